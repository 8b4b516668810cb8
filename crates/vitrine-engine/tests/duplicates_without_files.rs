//! Verification is optional: on a real sled store holding synthetic
//! embeddings of files that do not exist, near pairs are judged on the
//! cosine threshold alone and the result says so. The expected groups are
//! checked against brute-force cosine similarities computed here.

use anyhow::Result;
use vitrine_engine::catalog::Catalog;
use vitrine_engine::duplicates::{find_duplicates, DuplicateOptions, DuplicateTier, Verification};
use vitrine_store::{ChangeSet, ImageRecord, ModelFingerprint, Store, Upsert};

fn unit(v: &[f32]) -> Vec<f32> {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.iter().map(|x| x / norm).collect()
}

/// One synthetic file of a store whose image files do not exist.
struct Synthetic {
    embedding: Vec<f32>,
    /// Files with equal `content` are byte-identical copies.
    content: u8,
    side: u32,
}

/// A real store holding `files` as `image{i}.png` under a missing root.
fn store_of(dir: &std::path::Path, files: &[Synthetic]) -> Result<Store> {
    let fingerprint = ModelFingerprint {
        model_id: "synthetic".into(),
        weights_sha256: String::new(),
        preprocess: String::new(),
        pooling: "cls".into(),
        dim: 4,
    };
    let mut store = Store::create_or_open(&dir.join("store"), &fingerprint)?;
    let root = store.add_root(&dir.join("missing-images"))?;
    let upserts = files
        .iter()
        .enumerate()
        .map(|(i, file)| Upsert {
            replaces: None,
            record: ImageRecord {
                root,
                rel_path: format!("image{i}.png"),
                byte_size: 100 + i as u64,
                modified_unix_ns: 0,
                content_hash: [file.content; 32],
                pixel_hash: [file.content; 32],
                width: file.side,
                height: file.side,
                split: None,
                label: None,
            },
            embedding: file.embedding.clone(),
        })
        .collect();
    store.commit(ChangeSet {
        upserts,
        ..ChangeSet::default()
    })?;
    Ok(store)
}

#[test]
fn without_a_verifier_near_pairs_fall_back_to_the_threshold_and_say_so() -> Result<()> {
    let dir = tempfile::tempdir()?;
    // Two near pairs (cosines 0.995 and 0.8) and a loner, by construction.
    let vectors = [
        unit(&[1.0, 0.1, 0.0, 0.0]),
        unit(&[1.0, 0.0, 0.0, 0.0]),
        unit(&[0.0, 1.0, 0.0, 0.0]),
        unit(&[0.0, 1.0, 0.75, 0.0]),
        unit(&[0.0, 0.0, 0.0, 1.0]),
    ];
    let files: Vec<Synthetic> = vectors
        .iter()
        .enumerate()
        .map(|(i, embedding)| Synthetic {
            embedding: embedding.clone(),
            content: i as u8,
            side: 10,
        })
        .collect();
    let store = store_of(dir.path(), &files)?;
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

/// The keeper is no copy of itself, and a member's tier names the closest
/// link it has: three byte-identical files under a larger keeper of other
/// content are near copies of the keeper and bytes copies of each other.
#[test]
fn members_name_the_closest_link_and_the_keeper_has_none() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let copy = unit(&[1.0, 0.05, 0.0, 0.0]);
    let mut files = vec![Synthetic {
        embedding: unit(&[1.0, 0.0, 0.0, 0.0]),
        content: 1,
        side: 40,
    }];
    files.extend((0..3).map(|_| Synthetic {
        embedding: copy.clone(),
        content: 2,
        side: 10,
    }));
    let store = store_of(dir.path(), &files)?;
    let catalog = Catalog::load(&store)?;
    let options = DuplicateOptions {
        near_duplicate_threshold: 0.9,
        ..DuplicateOptions::default()
    };
    let report = find_duplicates(&store, &catalog, &options, None)?;
    assert_eq!(report.groups.len(), 1);
    let group = &report.groups[0];
    assert_eq!(group.tier, DuplicateTier::Near);
    let members = &group.members;
    assert_eq!(members[0].image.path, "image0.png", "the largest is kept");
    assert!(members[0].keeper);
    assert_eq!(members[0].tier, None);
    assert_eq!(members[0].copy_of, None);
    assert_eq!(members[1].tier, Some(DuplicateTier::Near));
    assert_eq!(members[1].copy_of, Some(members[0].image.id));
    for member in &members[2..] {
        assert_eq!(member.tier, Some(DuplicateTier::Bytes));
        assert_eq!(member.copy_of, Some(members[1].image.id));
    }
    Ok(())
}
