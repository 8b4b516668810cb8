//! Cluster summaries that explain themselves, on a real sled store holding
//! synthetic embeddings: two tight groups and one loose one. The collection's
//! cohesion is checked against a brute-force mean cosine computed here.

use anyhow::Result;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use vitrine_engine::catalog::Catalog;
use vitrine_engine::clusters::{cluster_collection, ClusterOptions};
use vitrine_store::{ChangeSet, ImageRecord, ModelFingerprint, Store, Upsert};

const DIM: usize = 16;

fn unit(v: Vec<f32>) -> Vec<f32> {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.into_iter().map(|x| x / norm).collect()
}

#[test]
fn tightness_separates_tight_groups_from_loose_ones() -> Result<()> {
    let dir = tempfile::tempdir()?;
    let fingerprint = ModelFingerprint {
        model_id: "synthetic".into(),
        weights_sha256: String::new(),
        preprocess: String::new(),
        pooling: "cls".into(),
        dim: DIM,
    };
    let mut store = Store::create_or_open(&dir.path().join("store"), &fingerprint)?;
    let root = store.add_root(&dir.path().join("missing-images"))?;
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    // Group g lies around axis g; "loose" spreads widely, the others barely.
    let groups = [
        ("tight-a", 0, 0.05f32),
        ("tight-b", 1, 0.05),
        ("loose", 2, 0.35),
    ];
    let mut upserts = Vec::new();
    let mut vectors = Vec::new();
    for (name, axis, spread) in groups {
        for i in 0..20 {
            let mut v: Vec<f32> = (0..DIM)
                .map(|_| spread * rng.random_range(-1.0..1.0))
                .collect();
            v[axis] += 1.0;
            let v = unit(v);
            vectors.push(v.clone());
            let n = upserts.len() as u8;
            upserts.push(Upsert {
                replaces: None,
                record: ImageRecord {
                    root,
                    rel_path: format!("{name}/{i}.png"),
                    byte_size: 100,
                    modified_unix_ns: 0,
                    content_hash: [n; 32],
                    pixel_hash: [n; 32],
                    width: 10,
                    height: 10,
                    split: None,
                    // Half of each group labelled with its name.
                    label: (i % 2 == 0).then(|| name.to_owned()),
                },
                embedding: v,
            });
        }
    }
    store.commit(ChangeSet {
        upserts,
        ..ChangeSet::default()
    })?;
    let catalog = Catalog::load(&store)?;
    let report = cluster_collection(
        &catalog,
        &ClusterOptions {
            n_clusters: Some(3),
            seed: 1,
        },
    )?;

    // Brute force: the mean cosine of every vector to their mean direction.
    let mut mean = vec![0f64; DIM];
    for v in &vectors {
        mean.iter_mut()
            .zip(v)
            .for_each(|(m, &x)| *m += f64::from(x));
    }
    let norm = mean.iter().map(|m| m * m).sum::<f64>().sqrt();
    let expected: f64 = vectors
        .iter()
        .map(|v| {
            v.iter()
                .zip(&mean)
                .map(|(&x, m)| f64::from(x) * m)
                .sum::<f64>()
                / norm
        })
        .sum::<f64>()
        / vectors.len() as f64;
    assert!((f64::from(report.collection_cohesion) - expected).abs() < 1e-4);

    assert_eq!(report.clusters.len(), 3);
    for cluster in &report.clusters {
        let group = cluster.members[0]
            .path
            .split('/')
            .next()
            .unwrap_or_default();
        assert!(
            cluster.members.iter().all(|m| m.path.starts_with(group)),
            "each cluster is one group"
        );
        assert_eq!(cluster.size, 20);
        assert_eq!(cluster.labelled_members, 10);
        assert_eq!(
            cluster.top_labels[0].share, 1.0,
            "shares are of labelled members"
        );
        let expected_tightness =
            (cluster.cohesion - report.collection_cohesion) / (1.0 - report.collection_cohesion);
        assert!((cluster.tightness - expected_tightness).abs() < 1e-6);
        println!(
            "{group}: cohesion {:.4}, tightness {:.4}",
            cluster.cohesion, cluster.tightness
        );
        if group == "loose" {
            assert!(
                cluster.tightness < 0.8,
                "loose group: {}",
                cluster.tightness
            );
        } else {
            assert!(
                cluster.tightness > 0.95,
                "tight group: {}",
                cluster.tightness
            );
        }
    }

    let automatic = cluster_collection(&catalog, &ClusterOptions::default())?;
    assert!(
        automatic.chosen_by.contains("sqrt(n / 2)"),
        "{}",
        automatic.chosen_by
    );
    // round(sqrt(60 / 2)) = 5.
    assert_eq!(automatic.n_clusters, 5);
    Ok(())
}
