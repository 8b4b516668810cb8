//! Verification is optional: on a real sled store holding synthetic
//! embeddings of files that do not exist, near pairs are judged on the
//! cosine threshold alone and the result says so. The expected groups are
//! checked against brute-force cosine similarities computed here.

use anyhow::Result;
use vitrine_engine::catalog::Catalog;
use vitrine_engine::duplicates::{find_duplicates, DuplicateOptions, Verification};
use vitrine_store::{ChangeSet, ImageRecord, ModelFingerprint, Store, Upsert};

fn unit(v: &[f32]) -> Vec<f32> {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.iter().map(|x| x / norm).collect()
}

#[test]
fn without_a_verifier_near_pairs_fall_back_to_the_threshold_and_say_so() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let fingerprint = ModelFingerprint {
        model_id: "synthetic".into(),
        weights_sha256: String::new(),
        preprocess: String::new(),
        pooling: "cls".into(),
        dim: 4,
    };
    let mut store = Store::create_or_open(&dir.path().join("store"), &fingerprint)?;
    let root = store.add_root(&dir.path().join("missing-images"))?;
    // Two near pairs (cosines 0.995 and 0.8) and a loner, by construction.
    let vectors = [
        unit(&[1.0, 0.1, 0.0, 0.0]),
        unit(&[1.0, 0.0, 0.0, 0.0]),
        unit(&[0.0, 1.0, 0.0, 0.0]),
        unit(&[0.0, 1.0, 0.75, 0.0]),
        unit(&[0.0, 0.0, 0.0, 1.0]),
    ];
    let upserts = vectors
        .iter()
        .enumerate()
        .map(|(i, embedding)| Upsert {
            replaces: None,
            record: ImageRecord {
                root,
                rel_path: format!("image{i}.png"),
                byte_size: 100 + i as u64,
                modified_unix_ns: 0,
                content_hash: [i as u8; 32],
                pixel_hash: [i as u8; 32],
                width: 10,
                height: 10,
                split: None,
                label: None,
            },
            embedding: embedding.clone(),
        })
        .collect();
    store.commit(ChangeSet {
        upserts,
        ..ChangeSet::default()
    })?;
    let catalog = Catalog::load(&store)?;
    let options = DuplicateOptions {
        near_duplicate_threshold: 0.9,
        ..DuplicateOptions::default()
    };
    assert!(options.verify, "verification is asked for by default");
    let report = find_duplicates(&store, &catalog, &options, None)?;

    // Brute force: the pairs at or above 0.9.
    let mut expected = Vec::new();
    for i in 0..vectors.len() {
        for j in i + 1..vectors.len() {
            let cosine: f32 = vectors[i].iter().zip(&vectors[j]).map(|(a, b)| a * b).sum();
            if cosine >= 0.9 {
                expected.push(vec![format!("image{i}.png"), format!("image{j}.png")]);
            }
        }
    }
    let mut found: Vec<Vec<String>> = report
        .groups
        .iter()
        .map(|g| {
            let mut paths: Vec<String> = g.members.iter().map(|m| m.image.path.clone()).collect();
            paths.sort();
            paths
        })
        .collect();
    found.sort();
    assert_eq!(found, expected);
    assert!(!report.verification.applied);
    assert!(
        report.verification.note.is_some(),
        "the fallback must be reported"
    );
    for member in report.groups.iter().flat_map(|g| &g.members) {
        assert_eq!(member.verification, Some(Verification::ThresholdOnly));
    }
    Ok(())
}
