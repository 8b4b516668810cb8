//! ANN quality of the persisted-and-reloaded HNSW index against exact search.

mod common;

use std::collections::HashMap;
use std::time::Instant;

use common::synthetic::{exact_top_k, recall_at_k, ClusteredSource};
use vitrine_store::{HnswParams, ImageId, Store};

#[test]
fn reloaded_index_recall_at_10_against_exact_search() -> anyhow::Result<()> {
    const DIM: usize = 384;
    const POINTS: usize = 100_000;
    const QUERIES: usize = 200;
    const K: usize = 10;
    // 1,000 Gaussian centres on the unit sphere, 100 points each on average.
    let source = ClusteredSource::new(11, DIM, 1_000, 0.03);
    let data = source.sample(12, POINTS);
    let queries = source.sample(13, QUERIES);

    let dir = tempfile::tempdir()?;
    let build_started = Instant::now();
    let row_of: HashMap<ImageId, usize> = {
        let (mut store, ids) = common::populated_store(dir.path(), &data, DIM);
        let built = build_started.elapsed();
        store.save_index()?;
        eprintln!(
            "built {POINTS} x {DIM} in {built:.1?} (commit + parallel insert), saved in {:.1?}, \
             dump {} MB",
            build_started.elapsed() - built,
            store.index_disk_bytes() / 1_000_000
        );
        ids.into_iter()
            .enumerate()
            .map(|(row, id)| (id, row))
            .collect()
    };

    let reopen_started = Instant::now();
    let store = Store::open(dir.path())?;
    eprintln!("reopened in {:.1?}", reopen_started.elapsed());
    assert!(
        store.index_was_loaded(),
        "the saved graph should be loaded, not rebuilt"
    );
    assert_eq!(store.params(), &HnswParams::default());

    let search_started = Instant::now();
    let mut found = Vec::with_capacity(QUERIES);
    for query in queries.chunks_exact(DIM) {
        let hits = store.search(query, K, None)?;
        found.push(hits.iter().map(|(id, _)| row_of[id]).collect::<Vec<_>>());
    }
    eprintln!("{QUERIES} searches in {:.1?}", search_started.elapsed());

    // Reference: exact brute-force top-10 by cosine similarity.
    let truth = exact_top_k(&data, &queries, DIM, K);
    let recall = recall_at_k(&found, &truth, K);
    eprintln!("recall@{K} = {recall:.4}");
    // The project's target: recall@10 >= 0.98 at default search settings.
    assert!(recall >= 0.98, "recall@10 = {recall:.4}");
    Ok(())
}
