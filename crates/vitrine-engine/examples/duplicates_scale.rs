//! Duplicates and leakage at scale on synthetic clustered vectors, against
//! the exact all-pairs computation (blocked matrix multiply) in the same run.
//! Prints a table with times and the recall of our near-duplicate pairs.
//!
//! cargo run --release -p vitrine-engine --example duplicates_scale -- [N...]

use std::collections::HashSet;
use std::time::Instant;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use vitrine_engine::catalog::Catalog;
use vitrine_engine::duplicates::{
    find_duplicate_groups, find_leaks, DuplicateOptions, LeakOptions,
};
use vitrine_store::{ChangeSet, ImageRecord, ModelFingerprint, Store, Upsert};

const DIM: usize = 384;
const THRESHOLD: f32 = 0.9;

fn normalise(v: &mut [f32]) {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.iter_mut().for_each(|x| *x /= norm);
}

/// `n` unit vectors around 1,000 centres; 5% of them are followed by a
/// near-copy (cosine about 0.97), the planted near-duplicates.
fn synthetic(n: usize, rng: &mut ChaCha8Rng) -> Vec<f32> {
    let centres: Vec<Vec<f32>> = (0..1000)
        .map(|_| {
            let mut c: Vec<f32> = (0..DIM).map(|_| rng.random::<f32>() - 0.5).collect();
            normalise(&mut c);
            c
        })
        .collect();
    let mut vectors = Vec::with_capacity(n * DIM);
    let mut i = 0;
    while i < n {
        let centre = &centres[rng.random_range(0..centres.len())];
        let mut v: Vec<f32> = centre
            .iter()
            .map(|c| c + 0.06 * (rng.random::<f32>() - 0.5))
            .collect();
        normalise(&mut v);
        vectors.extend_from_slice(&v);
        i += 1;
        if i < n && rng.random::<f32>() < 0.05 {
            let mut copy: Vec<f32> = v
                .iter()
                .map(|x| x + 0.012 * (rng.random::<f32>() - 0.5))
                .collect();
            normalise(&mut copy);
            vectors.extend_from_slice(&copy);
            i += 1;
        }
    }
    vectors
}

/// Every pair (i < j) with cosine >= THRESHOLD, by blocked matrix multiply.
fn exact_pairs(vectors: &[f32], n: usize) -> HashSet<(usize, usize)> {
    const BLOCK: usize = 512;
    (0..n.div_ceil(BLOCK))
        .into_par_iter()
        .flat_map_iter(|b| {
            let first = b * BLOCK;
            let rows = BLOCK.min(n - first);
            let mut scores = vec![0f32; rows * n];
            // SAFETY: scores is rows x n, lhs rows x DIM, rhs n x DIM (read transposed).
            unsafe {
                gemm::gemm(
                    rows,
                    n,
                    DIM,
                    scores.as_mut_ptr(),
                    1,
                    n as isize,
                    false,
                    vectors[first * DIM..].as_ptr(),
                    1,
                    DIM as isize,
                    vectors.as_ptr(),
                    DIM as isize,
                    1,
                    0.0,
                    1.0,
                    false,
                    false,
                    false,
                    gemm::Parallelism::None,
                );
            }
            let mut pairs = Vec::new();
            for r in 0..rows {
                for (c, &s) in scores[r * n..(r + 1) * n].iter().enumerate() {
                    if c > first + r && s >= THRESHOLD {
                        pairs.push((first + r, c));
                    }
                }
            }
            pairs
        })
        .collect()
}

fn main() -> anyhow::Result<()> {
    let sizes: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| a.parse())
        .collect::<Result<_, _>>()?;
    let sizes = if sizes.is_empty() {
        vec![10_000, 100_000]
    } else {
        sizes
    };
    println!("Duplicates and leakage on synthetic clustered 384-d vectors (threshold {THRESHOLD}, 10 neighbours per image)");
    println!();
    println!("| images | store build s | duplicates s | leaks s | exact all-pairs s | pair recall | groups |");
    println!("|---:|---:|---:|---:|---:|---:|---:|");
    for n in sizes {
        let mut rng = ChaCha8Rng::seed_from_u64(n as u64);
        let vectors = synthetic(n, &mut rng);
        let dir = tempfile::tempdir()?;
        let fingerprint = ModelFingerprint {
            model_id: "synthetic".into(),
            weights_sha256: "0".repeat(64),
            preprocess: "none".into(),
            pooling: "cls".into(),
            dim: DIM,
        };
        let started = Instant::now();
        let mut store = Store::create_or_open(dir.path(), &fingerprint)?;
        let root = store.add_root(dir.path())?;
        for chunk_start in (0..n).step_by(10_000) {
            let upserts = (chunk_start..(chunk_start + 10_000).min(n))
                .map(|i| {
                    let mut content_hash = [0u8; 32];
                    content_hash[..8].copy_from_slice(&(i as u64).to_le_bytes());
                    Upsert {
                        replaces: None,
                        record: ImageRecord {
                            root,
                            rel_path: format!(
                                "{}/c/{i}.jpg",
                                ["train", "train", "train", "val", "test"][i % 5]
                            ),
                            byte_size: 1000,
                            modified_unix_ns: 0,
                            content_hash,
                            pixel_hash: content_hash,
                            width: 100,
                            height: 100,
                            split: Some(["train", "train", "train", "val", "test"][i % 5].into()),
                            label: None,
                        },
                        embedding: vectors[i * DIM..(i + 1) * DIM].to_vec(),
                    }
                })
                .collect();
            store.commit(ChangeSet {
                upserts,
                ..ChangeSet::default()
            })?;
        }
        store.save_index()?;
        let build_s = started.elapsed().as_secs_f64();
        let catalog = Catalog::load(&store)?;
        let options = DuplicateOptions {
            near_duplicate_threshold: THRESHOLD,
            verify: false,
            ..DuplicateOptions::default()
        };
        let started = Instant::now();
        let groups = find_duplicate_groups(&store, &catalog, &options)?;
        let duplicates_s = started.elapsed().as_secs_f64();
        let started = Instant::now();
        let leak_options = LeakOptions {
            duplicates: options.clone(),
            ..LeakOptions::default()
        };
        find_leaks(&store, &catalog, &leak_options)?;
        let leaks_s = started.elapsed().as_secs_f64();

        let started = Instant::now();
        // Catalog rows follow store ids, which were assigned in insertion order.
        let exact = exact_pairs(&catalog.embeddings, catalog.len());
        let exact_s = started.elapsed().as_secs_f64();
        let mut group_of = vec![usize::MAX; catalog.len()];
        for (g, group) in groups.iter().enumerate() {
            for member in &group.members {
                group_of[catalog.row(member.image.id).unwrap()] = g;
            }
        }
        let found = exact
            .iter()
            .filter(|&&(a, b)| group_of[a] != usize::MAX && group_of[a] == group_of[b])
            .count();
        let recall = found as f64 / exact.len().max(1) as f64;
        println!(
            "| {n} | {build_s:.1} | {duplicates_s:.2} | {leaks_s:.2} | {exact_s:.1} | {recall:.4} ({found}/{}) | {} |",
            exact.len(),
            groups.len()
        );
    }
    Ok(())
}
