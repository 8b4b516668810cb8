//! Persistence, crash consistency, removals and metadata of a store on real sled
//! databases in temporary directories.

mod common;

use std::collections::{HashMap, HashSet};
use std::fs;
use std::path::Path;

use common::synthetic::{exact_top_k, recall_at_k, ClusteredSource};
use common::{fingerprint, populated_store, record};
use rayon::prelude::*;
use vitrine_store::{ChangeSet, FileError, ImageId, Store, StoreError, Upsert};

const DIM: usize = 32;
const K: usize = 10;

fn dataset(points: usize) -> (Vec<f32>, Vec<f32>) {
    let source = ClusteredSource::new(5, DIM, 40, 0.08);
    (source.sample(6, points), source.sample(7, 40))
}

fn search_all(store: &Store, queries: &[f32]) -> Vec<Vec<(ImageId, f32)>> {
    queries
        .chunks_exact(DIM)
        .map(|q| store.search(q, K, None).expect("search"))
        .collect()
}

/// Checks search results against exact brute force over the rows still live:
/// recall@10 >= 0.95 (HNSW at these sizes is near exact; the margin is common
/// practice), no removed image, and each similarity equal to the exact dot product.
fn assert_matches_exact(
    store: &Store,
    data: &[f32],
    ids: &[ImageId],
    removed: &HashSet<ImageId>,
    queries: &[f32],
) {
    let live_rows: Vec<usize> = (0..ids.len())
        .filter(|r| !removed.contains(&ids[*r]))
        .collect();
    let live_data: Vec<f32> = live_rows
        .iter()
        .flat_map(|r| data[r * DIM..(r + 1) * DIM].iter().copied())
        .collect();
    let truth = exact_top_k(&live_data, queries, DIM, K);
    let row_of: HashMap<ImageId, usize> = ids.iter().enumerate().map(|(r, id)| (*id, r)).collect();
    let position_of: HashMap<usize, usize> =
        live_rows.iter().enumerate().map(|(p, r)| (*r, p)).collect();
    let mut found = Vec::new();
    for query in queries.chunks_exact(DIM) {
        let hits = store.search(query, K, None).expect("search");
        assert_eq!(hits.len(), K);
        let mut positions = Vec::new();
        for (id, similarity) in hits {
            assert!(!removed.contains(&id), "removed image {id} returned");
            let row = row_of[&id];
            let exact: f32 = data[row * DIM..(row + 1) * DIM]
                .iter()
                .zip(query)
                .map(|(a, b)| a * b)
                .sum::<f32>()
                / query.iter().map(|x| x * x).sum::<f32>().sqrt();
            assert!((similarity - exact).abs() < 1e-4, "{similarity} vs {exact}");
            positions.push(position_of[&row]);
        }
        found.push(positions);
    }
    let recall = recall_at_k(&found, &truth, K);
    assert!(recall >= 0.95, "recall@10 = {recall}");
}

fn remove(store: &mut Store, ids: &[ImageId]) {
    store
        .commit(ChangeSet {
            removals: ids.to_vec(),
            ..ChangeSet::default()
        })
        .expect("remove");
}

/// Commits rows `rows` of `data` as images `rows` (records from `record`); returns
/// their ids.
fn commit_rows(store: &mut Store, data: &[f32], rows: std::ops::Range<usize>) -> Vec<ImageId> {
    let upserts = rows
        .map(|i| Upsert {
            replaces: None,
            record: record(i),
            embedding: data[i * DIM..(i + 1) * DIM].to_vec(),
        })
        .collect();
    store
        .commit(ChangeSet {
            upserts,
            ..ChangeSet::default()
        })
        .expect("commit")
}

fn copy_dir(from: &Path, to: &Path) {
    fs::create_dir_all(to).expect("create copy");
    for entry in fs::read_dir(from).expect("list") {
        let entry = entry.expect("entry");
        let target = to.join(entry.file_name());
        if entry.file_type().expect("type").is_dir() {
            copy_dir(&entry.path(), &target);
        } else {
            fs::copy(entry.path(), &target).expect("copy");
        }
    }
}

fn dump_files(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = fs::read_dir(dir.join("hnsw"))
        .expect("list dumps")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
}

#[test]
fn store_is_send_and_sync() {
    fn assert_send_sync<T: Send + Sync>() {}
    assert_send_sync::<Store>();
}

#[test]
fn reopened_store_loads_graph_and_answers_identically() {
    let (data, queries) = dataset(3_000);
    let dir = tempfile::tempdir().unwrap();
    let before = {
        let (mut store, ids) = populated_store(dir.path(), &data, DIM);
        store.save_index().unwrap();
        assert!(store.index_disk_bytes() > (ids.len() * DIM * 4) as u64);
        search_all(&store, &queries)
    };
    let store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    assert_eq!(store.len(), 3_000);
    assert_eq!(search_all(&store, &queries), before);
    drop(store);
    let store = Store::create_or_open(dir.path(), &fingerprint(DIM)).unwrap();
    assert!(store.index_was_loaded());
    assert_eq!(search_all(&store, &queries), before);
}

#[test]
fn unsaved_graph_is_rebuilt_once_then_loaded() {
    let (data, queries) = dataset(1_500);
    let dir = tempfile::tempdir().unwrap();
    let ids = populated_store(dir.path(), &data, DIM).1;
    let store = Store::open(dir.path()).unwrap();
    assert!(!store.index_was_loaded());
    assert_matches_exact(&store, &data, &ids, &HashSet::new(), &queries);
    drop(store);
    assert!(Store::open(dir.path()).unwrap().index_was_loaded());
}

#[test]
fn commits_after_the_last_save_are_searchable_after_reopen() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, ids) = populated_store(dir.path(), &data[..1_000 * DIM], DIM);
    store.save_index().unwrap();
    let mut all_ids = ids;
    all_ids.extend(commit_rows(&mut store, &data, 1_000..2_000));
    drop(store); // no save: the graph on disk lacks the second half
    let store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    assert_matches_exact(&store, &data, &all_ids, &HashSet::new(), &queries);
}

/// Crash between writing a dump and recording it: sled still names the older dump,
/// the newer files lie beside it unrecorded.
#[test]
fn dump_written_but_not_recorded_is_ignored() {
    let (all_data, queries) = dataset(2_001);
    let data = &all_data[..2_000 * DIM];
    let work = tempfile::tempdir().unwrap();
    let live = work.path().join("live");
    let (mut store, ids) = populated_store(&live, data, DIM);
    store.save_index().unwrap(); // generation 1
    let removed: Vec<ImageId> = ids[..150].to_vec();
    remove(&mut store, &removed);
    drop(store);
    let crashed = work.path().join("crashed");
    copy_dir(&live, &crashed); // sled: removals committed, generation 1 recorded

    // Generation 2 holds one more image (removals alone leave the graph unchanged
    // and write no new generation).
    let mut store = Store::open(&live).unwrap();
    store
        .commit(ChangeSet {
            upserts: vec![Upsert {
                replaces: None,
                record: record(2_000),
                embedding: all_data[2_000 * DIM..].to_vec(),
            }],
            ..ChangeSet::default()
        })
        .unwrap();
    store.save_index().unwrap();
    drop(store);
    let newer: Vec<String> = dump_files(&live);
    for name in &newer {
        fs::copy(
            live.join("hnsw").join(name),
            crashed.join("hnsw").join(name),
        )
        .unwrap();
    }
    assert_eq!(dump_files(&crashed).len(), 4, "both generations present");

    let store = Store::open(&crashed).unwrap();
    assert!(
        store.index_was_loaded(),
        "the recorded generation should load"
    );
    assert_eq!(store.len(), 2_000 - removed.len());
    let removed: HashSet<ImageId> = removed.into_iter().collect();
    assert_matches_exact(&store, data, &ids, &removed, &queries);
    // The removed images are themselves the hardest queries: each would be its own
    // nearest neighbour.
    for id in &removed {
        let row = ids.iter().position(|x| x == id).unwrap();
        let hits = store
            .search(&data[row * DIM..(row + 1) * DIM], K, None)
            .unwrap();
        assert!(hits.iter().all(|(hit, _)| !removed.contains(hit)));
    }
    assert_eq!(
        dump_files(&crashed).len(),
        2,
        "unrecorded dump deleted on open"
    );
}

fn assert_recovers_from_damaged_dump(damage: impl Fn(&Path)) {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, ids) = populated_store(dir.path(), &data, DIM);
    store.save_index().unwrap();
    let removed: Vec<ImageId> = ids[500..600].to_vec();
    remove(&mut store, &removed);
    drop(store);
    damage(&dir.path().join("hnsw"));

    let store = Store::open(dir.path()).unwrap();
    assert!(
        !store.index_was_loaded(),
        "a damaged dump must not be loaded"
    );
    let removed: HashSet<ImageId> = removed.into_iter().collect();
    assert_matches_exact(&store, &data, &ids, &removed, &queries);
    drop(store);
    // The rebuilt graph was saved on open.
    let store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    assert_matches_exact(&store, &data, &ids, &removed, &queries);
}

fn dump_file_with_suffix(graph_dir: &Path, suffix: &str) -> std::path::PathBuf {
    fs::read_dir(graph_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.to_string_lossy().ends_with(suffix))
        .expect("dump file")
}

#[test]
fn truncated_data_file_triggers_rebuild() {
    assert_recovers_from_damaged_dump(|graph_dir| {
        let path = dump_file_with_suffix(graph_dir, ".hnsw.data");
        let len = fs::metadata(&path).unwrap().len();
        let file = fs::OpenOptions::new().write(true).open(&path).unwrap();
        file.set_len(len / 2).unwrap();
    });
}

#[test]
fn corrupted_graph_file_triggers_rebuild() {
    assert_recovers_from_damaged_dump(|graph_dir| {
        let path = dump_file_with_suffix(graph_dir, ".hnsw.graph");
        let mut bytes = fs::read(&path).unwrap();
        let middle = bytes.len() / 2;
        bytes[middle] ^= 0xff;
        fs::write(&path, bytes).unwrap();
    });
}

#[test]
fn missing_graph_file_triggers_rebuild() {
    assert_recovers_from_damaged_dump(|graph_dir| {
        fs::remove_file(dump_file_with_suffix(graph_dir, ".hnsw.graph")).unwrap();
    });
}

#[test]
fn removed_images_never_come_back() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, ids) = populated_store(dir.path(), &data, DIM);
    store.save_index().unwrap();
    // Remove the exact nearest neighbours of every query first: the graph's best
    // answers are then all dead.
    let truth = exact_top_k(&data, &queries, DIM, K);
    let mut removed: HashSet<ImageId> = truth.iter().flatten().map(|r| ids[*r]).collect();
    remove(&mut store, &removed.iter().copied().collect::<Vec<_>>());
    assert_matches_exact(&store, &data, &ids, &removed, &queries);

    // Reopen with few removals (< 20% of the graph): loaded and filtered.
    drop(store);
    let mut store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    assert_matches_exact(&store, &data, &ids, &removed, &queries);

    // Remove another third and reopen: too many dead nodes, so the graph is rebuilt.
    let more: Vec<ImageId> = ids.iter().step_by(3).copied().collect();
    remove(&mut store, &more);
    removed.extend(more);
    assert_matches_exact(&store, &data, &ids, &removed, &queries);
    drop(store);
    let store = Store::open(dir.path()).unwrap();
    assert!(!store.index_was_loaded());
    assert_eq!(store.len(), 2_000 - removed.len());
    assert_matches_exact(&store, &data, &ids, &removed, &queries);
    for id in &removed {
        assert_eq!(store.record(*id).unwrap(), None);
        assert_eq!(store.embedding(*id).unwrap(), None);
    }
}

#[test]
fn filter_restricts_results() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (store, ids) = populated_store(dir.path(), &data, DIM);
    // Only every tenth image is acceptable; exact answer from brute force over those.
    let accepted: HashSet<ImageId> = ids.iter().step_by(10).copied().collect();
    let rows: Vec<usize> = (0..ids.len()).step_by(10).collect();
    let subset: Vec<f32> = rows
        .iter()
        .flat_map(|r| data[r * DIM..(r + 1) * DIM].iter().copied())
        .collect();
    let truth = exact_top_k(&subset, &queries, DIM, K);
    let accept = |id: ImageId| accepted.contains(&id);
    let found: Vec<Vec<usize>> = queries
        .chunks_exact(DIM)
        .map(|q| {
            let hits = store.search(q, K, Some(&accept)).unwrap();
            assert_eq!(hits.len(), K);
            hits.iter()
                .map(|(id, _)| rows.iter().position(|r| ids[*r] == *id).expect("accepted"))
                .collect()
        })
        .collect();
    // Exact brute force over the accepted subset; 0.95 margin is common practice.
    assert!(recall_at_k(&found, &truth, K) >= 0.95);
}

#[test]
fn replacing_keeps_the_id_only_for_an_unchanged_embedding() {
    let (data, _) = dataset(3);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, ids) = populated_store(dir.path(), &data, DIM);
    let row = |i: usize| data[i * DIM..(i + 1) * DIM].to_vec();

    let mut touched = record(0);
    touched.modified_unix_ns += 1;
    let same = store
        .commit(ChangeSet {
            upserts: vec![Upsert {
                replaces: Some(ids[0]),
                record: touched.clone(),
                embedding: row(0),
            }],
            ..ChangeSet::default()
        })
        .unwrap();
    assert_eq!(same, vec![ids[0]]);
    assert_eq!(store.record(ids[0]).unwrap(), Some(touched));

    // Same path, new content: a new id, the old image gone.
    let changed = store
        .commit(ChangeSet {
            upserts: vec![Upsert {
                replaces: None,
                record: record(0),
                embedding: row(1),
            }],
            ..ChangeSet::default()
        })
        .unwrap();
    assert_ne!(changed[0], ids[0]);
    assert_eq!(store.record(ids[0]).unwrap(), None);
    assert_eq!(
        store.id_for_path(0, &record(0).rel_path).unwrap(),
        Some(changed[0])
    );
    assert_eq!(store.len(), 3);
    let hits = store.search(&row(1), 3, None).unwrap();
    assert!(hits.iter().all(|(id, _)| *id != ids[0]));
    assert!(hits.iter().any(|(id, _)| *id == changed[0]));
}

#[test]
fn content_hash_finds_an_existing_embedding() {
    let (data, _) = dataset(2);
    let dir = tempfile::tempdir().unwrap();
    let (store, ids) = populated_store(dir.path(), &data, DIM);
    let by_hash = store
        .embedding_by_content_hash(&record(1).content_hash)
        .unwrap();
    assert_eq!(by_hash, store.embedding(ids[1]).unwrap());
    assert!(by_hash.is_some());
    assert_eq!(store.embedding_by_content_hash(&[9u8; 32]).unwrap(), None);
}

#[test]
fn pair_notes_on_contents_no_image_has_are_forgotten() {
    let (data, _) = dataset(3);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, ids) = populated_store(dir.path(), &data, DIM);
    let hash = |i: usize| record(i).content_hash;
    let kind = *b"testkind";
    let gone = [7u8; 32];
    let notes = [
        (hash(0), hash(1), b"kept".to_vec()),
        (hash(1), hash(2), b"image 2 removed".to_vec()),
        (hash(0), gone, b"never indexed".to_vec()),
    ];
    store.put_pair_notes(&kind, &notes).unwrap();
    remove(&mut store, &ids[2..]);

    assert_eq!(store.forget_orphan_pair_notes().unwrap(), 2);
    assert_eq!(
        store.pair_note(&kind, &hash(0), &hash(1)).unwrap(),
        Some(b"kept".to_vec())
    );
    assert_eq!(store.pair_note(&kind, &hash(1), &hash(2)).unwrap(), None);
    assert_eq!(store.pair_note(&kind, &hash(0), &gone).unwrap(), None);
    assert_eq!(store.forget_orphan_pair_notes().unwrap(), 0);
}

#[test]
fn file_errors_are_recorded_cleared_and_superseded() {
    let (data, _) = dataset(1);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, _) = populated_store(dir.path(), &data, DIM);
    let error = |rel_path: &str| FileError {
        root: 0,
        rel_path: rel_path.into(),
        reason: "truncated JPEG".into(),
        at_unix_s: 1_700_000_000,
    };
    store
        .commit(ChangeSet {
            errors: vec![error("a.jpg"), error("b.jpg"), error(&record(7).rel_path)],
            ..ChangeSet::default()
        })
        .unwrap();
    assert_eq!(store.errors().unwrap().len(), 3);
    store
        .commit(ChangeSet {
            cleared_errors: vec![(0, "a.jpg".into())],
            upserts: vec![Upsert {
                replaces: None,
                record: record(7),
                embedding: data.clone(),
            }],
            ..ChangeSet::default()
        })
        .unwrap();
    assert_eq!(store.errors().unwrap(), vec![error("b.jpg")]);
    drop(store);
    let store = Store::open(dir.path()).unwrap();
    assert_eq!(store.errors().unwrap(), vec![error("b.jpg")]);
    assert_eq!(store.roots(), vec![(0, "/data/shelf".into())]);
}

#[test]
fn invalid_changes_are_rejected_without_partial_effects() {
    let (data, _) = dataset(2);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, _) = populated_store(dir.path(), &data, DIM);
    let good = Upsert {
        replaces: None,
        record: record(10),
        embedding: data[..DIM].to_vec(),
    };
    let short = Upsert {
        replaces: None,
        record: record(11),
        embedding: vec![1.0; DIM - 1],
    };
    let result = store.commit(ChangeSet {
        upserts: vec![good.clone(), short],
        ..ChangeSet::default()
    });
    assert!(matches!(
        result,
        Err(StoreError::DimensionMismatch { expected: DIM, .. })
    ));
    assert_eq!(store.id_for_path(0, &record(10).rel_path).unwrap(), None);
    assert_eq!(store.len(), 2);

    let zero = Upsert {
        replaces: None,
        record: record(12),
        embedding: vec![0.0; DIM],
    };
    let result = store.commit(ChangeSet {
        upserts: vec![zero],
        ..ChangeSet::default()
    });
    assert!(matches!(result, Err(StoreError::InvalidEmbedding { .. })));

    let mut elsewhere = good.clone();
    elsewhere.record.root = 9;
    let result = store.commit(ChangeSet {
        upserts: vec![elsewhere],
        ..ChangeSet::default()
    });
    assert!(matches!(
        result,
        Err(StoreError::UnknownRoot { root: 9, .. })
    ));

    let result = store.commit(ChangeSet {
        upserts: vec![good.clone(), good],
        ..ChangeSet::default()
    });
    assert!(matches!(
        result,
        Err(StoreError::DuplicateInChangeSet { .. })
    ));
    assert_eq!(store.len(), 2);
}

#[test]
fn model_mismatch_names_both_models() {
    let dir = tempfile::tempdir().unwrap();
    drop(Store::create_or_open(dir.path(), &fingerprint(DIM)).unwrap());
    let mut other = fingerprint(DIM);
    other.model_id = "test-vit-base".into();
    other.pooling = "mean".into();
    let error = match Store::create_or_open(dir.path(), &other) {
        Err(error) => error,
        Ok(_) => panic!("a different model must be refused"),
    };
    let message = error.to_string();
    assert!(
        matches!(error, StoreError::ModelMismatch { .. }),
        "{message}"
    );
    assert!(
        message.contains("test-vit-small (weights 01234567…, cls, dim 32)"),
        "{message}"
    );
    assert!(
        message.contains("test-vit-base (weights 01234567…, mean, dim 32)"),
        "{message}"
    );
    assert!(message.contains("model_id, pooling"), "{message}");
}

#[test]
fn opening_a_missing_store_fails_cleanly() {
    let dir = tempfile::tempdir().unwrap();
    assert!(matches!(
        Store::open(&dir.path().join("nothing here")),
        Err(StoreError::NotAStore { .. })
    ));
    assert!(matches!(
        Store::open(dir.path()),
        Err(StoreError::NotAStore { .. })
    ));
}

#[test]
fn reopening_right_after_dropping_succeeds() {
    // sled releases its file lock only when its flusher thread exits, a moment after
    // the drop; opening must wait for that instead of failing at random.
    let dir = tempfile::tempdir().unwrap();
    for _ in 0..20 {
        drop(Store::create_or_open(dir.path(), &fingerprint(DIM)).unwrap());
    }
}

#[test]
fn a_store_held_open_is_reported_in_use() {
    let dir = tempfile::tempdir().unwrap();
    let _held = Store::create_or_open(dir.path(), &fingerprint(DIM)).unwrap();
    let error = match Store::open(dir.path()) {
        Err(error) => error,
        Ok(_) => panic!("a second open of a held store must fail"),
    };
    assert!(matches!(error, StoreError::InUse { .. }), "{error}");
    assert!(
        error.to_string().contains("open in another process"),
        "{error}"
    );
}

#[test]
fn empty_store_saves_and_searches() {
    let dir = tempfile::tempdir().unwrap();
    let mut store = Store::create_or_open(dir.path(), &fingerprint(DIM)).unwrap();
    store.save_index().unwrap();
    assert!(store.search(&[1.0; DIM], K, None).unwrap().is_empty());
    assert_eq!(store.index_disk_bytes(), 0);
    assert!(matches!(
        store.search(&[1.0; 3], K, None),
        Err(StoreError::DimensionMismatch { found: 3, .. })
    ));
}

#[test]
fn saving_an_unchanged_graph_writes_nothing() {
    let (data, queries) = dataset(1_500);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, ids) = populated_store(dir.path(), &data, DIM);
    store.save_index().unwrap();
    let saved = dump_files(dir.path());
    let bytes = store.index_disk_bytes();
    drop(store);

    let mut store = Store::open(dir.path()).unwrap();
    let removed: Vec<ImageId> = ids[..20].to_vec();
    remove(&mut store, &removed);
    store.save_index().unwrap();
    assert_eq!(
        dump_files(dir.path()),
        saved,
        "removals alone keep the dump"
    );
    assert_eq!(store.index_disk_bytes(), bytes);
    drop(store);

    let store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    let removed: HashSet<ImageId> = removed.into_iter().collect();
    assert_matches_exact(&store, &data, &ids, &removed, &queries);
}

/// A reopened store answers from the loaded dump, and commits extend that graph.
#[test]
fn commits_after_reopening_extend_the_loaded_graph() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, mut ids) = populated_store(dir.path(), &data[..1_500 * DIM], DIM);
    store.save_index().unwrap();
    drop(store);

    let mut store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    ids.extend(commit_rows(&mut store, &data, 1_500..2_000));
    assert!(store.index_was_loaded(), "extended, not rebuilt");
    assert_matches_exact(&store, &data, &ids, &HashSet::new(), &queries);
    store.save_index().unwrap();
    let before = search_all(&store, &queries);
    drop(store);

    let store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    assert_eq!(store.len(), 2_000);
    assert_eq!(search_all(&store, &queries), before);
}

/// Opening reads the whole dump into memory, so losing its files afterwards loses
/// nothing: commits extend the graph in memory and the next save writes a whole dump.
#[test]
fn dump_lost_after_opening_is_written_again_by_the_next_save() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, mut ids) = populated_store(dir.path(), &data[..1_800 * DIM], DIM);
    store.save_index().unwrap();
    drop(store);

    let mut store = Store::open(dir.path()).unwrap();
    for name in dump_files(dir.path()) {
        fs::remove_file(dir.path().join("hnsw").join(name)).unwrap();
    }
    ids.extend(commit_rows(&mut store, &data, 1_800..2_000));
    assert!(store.index_was_loaded(), "extended, not rebuilt");
    assert_matches_exact(&store, &data, &ids, &HashSet::new(), &queries);
    store.save_index().unwrap();
    drop(store);
    let store = Store::open(dir.path()).unwrap();
    assert!(store.index_was_loaded());
    assert_matches_exact(&store, &data, &ids, &HashSet::new(), &queries);
}

/// With a filter that accepts almost nothing, the search keeps walking the graph
/// until it has found every acceptable image.
#[test]
fn filter_accepting_few_images_returns_all_of_them_in_order() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (store, ids) = populated_store(dir.path(), &data, DIM);
    let rows = [17usize, 904, 1_999];
    let accepted: HashSet<ImageId> = rows.iter().map(|r| ids[*r]).collect();
    let accept = |id: ImageId| accepted.contains(&id);
    for query in queries.chunks_exact(DIM) {
        let hits = store.search(query, K, Some(&accept)).unwrap();
        // Reference: the accepted rows sorted by exact dot product.
        let mut expected: Vec<(f32, ImageId)> = rows
            .iter()
            .map(|r| {
                let row = &data[r * DIM..(r + 1) * DIM];
                (row.iter().zip(query).map(|(a, b)| a * b).sum(), ids[*r])
            })
            .collect();
        expected.sort_by(|a, b| b.0.total_cmp(&a.0));
        let found: Vec<ImageId> = hits.iter().map(|(id, _)| *id).collect();
        let expected: Vec<ImageId> = expected.iter().map(|(_, id)| *id).collect();
        assert_eq!(found, expected);
    }
}

/// The first searches after a commit copy the graph into its search form; threads
/// racing to do so must all get the same answers, and rayon tasks (which may run
/// other tasks while they wait) must not block each other.
#[test]
fn concurrent_searches_after_a_commit_agree() {
    let (data, queries) = dataset(2_000);
    let dir = tempfile::tempdir().unwrap();
    let (mut store, _) = populated_store(dir.path(), &data[..1_000 * DIM], DIM);
    commit_rows(&mut store, &data, 1_000..1_500);
    let answers: Vec<Vec<Vec<(ImageId, f32)>>> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..4)
            .map(|_| scope.spawn(|| search_all(&store, &queries)))
            .collect();
        workers.into_iter().map(|w| w.join().unwrap()).collect()
    });
    let sequential = search_all(&store, &queries);
    for answer in answers {
        assert_eq!(answer, sequential);
    }

    commit_rows(&mut store, &data, 1_500..2_000);
    let from_tasks: Vec<Vec<(ImageId, f32)>> = queries
        .par_chunks_exact(DIM)
        .map(|q| store.search(q, K, None).expect("search"))
        .collect();
    assert_eq!(from_tasks, search_all(&store, &queries));
}

/// A filter may itself search the store (a nested search on the same thread).
#[test]
fn filter_may_search_the_same_store() {
    let (data, queries) = dataset(1_000);
    let dir = tempfile::tempdir().unwrap();
    let (store, _) = populated_store(dir.path(), &data, DIM);
    let query = &queries[..DIM];
    let best = store.search(query, 1, None).unwrap()[0].0;
    let not_the_best = |id: ImageId| store.search(query, 1, None).unwrap()[0].0 != id;
    let hits = store.search(query, K, Some(&not_the_best)).unwrap();
    assert_eq!(hits.len(), K);
    assert!(hits.iter().all(|(id, _)| *id != best));
    // The next K of an unfiltered search; both searches are approximate, so allow one
    // difference.
    let unfiltered = store.search(query, K + 1, None).unwrap();
    let shared = hits
        .iter()
        .filter(|hit| unfiltered[1..].contains(hit))
        .count();
    assert!(shared >= K - 1, "{shared} of {K} shared");
}

#[test]
fn concurrent_decisions_each_get_their_own_number_and_survive_reopening() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::create_or_open(dir.path(), &fingerprint(DIM)).unwrap();
    let numbers: Vec<u64> = (0..64u32)
        .into_par_iter()
        .map(|i| store.append_decision(&i.to_le_bytes()).unwrap())
        .collect();
    let mut sorted = numbers.clone();
    sorted.sort_unstable();
    assert_eq!(
        sorted,
        (1..=64).collect::<Vec<u64>>(),
        "no number taken twice"
    );
    let log = store.decisions().unwrap();
    drop(store);
    let reopened = Store::open(dir.path()).unwrap();
    assert_eq!(reopened.decisions().unwrap(), log);
    for (i, number) in numbers.iter().enumerate() {
        let (_, bytes) = &log[*number as usize - 1];
        assert_eq!(
            bytes,
            &(i as u32).to_le_bytes(),
            "decision {number} holds what was appended"
        );
    }
}
