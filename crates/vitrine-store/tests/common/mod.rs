#![allow(dead_code)] // each test binary uses a different subset

pub mod synthetic;

use std::path::Path;

use vitrine_store::{ChangeSet, ImageId, ImageRecord, ModelFingerprint, Store, Upsert};

pub fn fingerprint(dim: usize) -> ModelFingerprint {
    ModelFingerprint {
        model_id: "test-vit-small".into(),
        weights_sha256: "0123456789abcdef0123456789abcdef0123456789abcdef0123456789abcdef".into(),
        preprocess: "resize-224-bicubic".into(),
        pooling: "cls".into(),
        dim,
    }
}

/// A record for synthetic image `i` of root 0.
pub fn record(i: usize) -> ImageRecord {
    let mut content_hash = [0u8; 32];
    content_hash[..8].copy_from_slice(&(i as u64).to_le_bytes());
    ImageRecord {
        root: 0,
        rel_path: format!("shelf/{i:06}.png"),
        byte_size: 1000 + i as u64,
        modified_unix_ns: 1_700_000_000_000_000_000,
        content_hash,
        pixel_hash: content_hash,
        width: 64,
        height: 48,
        split: Some("train".into()),
        label: None,
    }
}

/// Creates a store in `dir` with one root and the rows of `vectors` as images
/// 0..n (committed in chunks); returns the store and the id of each row.
pub fn populated_store(dir: &Path, vectors: &[f32], dim: usize) -> (Store, Vec<ImageId>) {
    let mut store = Store::create_or_open(dir, &fingerprint(dim)).expect("create store");
    store.add_root(Path::new("/data/shelf")).expect("add root");
    let mut ids = Vec::new();
    let rows: Vec<&[f32]> = vectors.chunks_exact(dim).collect();
    for (chunk_index, chunk) in rows.chunks(10_000).enumerate() {
        let upserts = chunk
            .iter()
            .enumerate()
            .map(|(j, v)| Upsert {
                replaces: None,
                record: record(chunk_index * 10_000 + j),
                embedding: v.to_vec(),
            })
            .collect();
        let changes = ChangeSet {
            upserts,
            ..ChangeSet::default()
        };
        ids.extend(store.commit(changes).expect("commit"));
    }
    (store, ids)
}
