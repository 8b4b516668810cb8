//! Grows an existing store to a benchmark size with synthetic images, for load
//! tests of a large collection without embedding that many real pictures.
//!
//! Run (release):
//!   cargo run --release -p vitrine-store --example pad_store -- STORE_DIR COUNT
//!
//! The padding images are clustered unit vectors of the store's own dimension,
//! recorded under a root that does not exist on disk (`/vitrine-synthetic-padding`),
//! split `train`, label `padding`: neighbour queries and uploads search them like
//! any other image; their thumbnails answer "file not found". Only for benchmarks:
//! never pad a collection you care about.

// Only the clustered source is used here; the module also holds test helpers.
#[allow(dead_code)]
#[path = "../tests/common/synthetic.rs"]
mod synthetic;

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context};
use synthetic::ClusteredSource;
use vitrine_store::{ChangeSet, ImageRecord, Store, Upsert};

const PADDING_ROOT: &str = "/vitrine-synthetic-padding";
const COMMIT_SIZE: usize = 10_000;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [dir, count] = args.as_slice() else {
        bail!("usage: pad_store STORE_DIR COUNT");
    };
    let dir = PathBuf::from(dir);
    let count: usize = count.parse().context("COUNT is a number of images")?;
    let started = Instant::now();
    let mut store = Store::open(&dir).with_context(|| format!("opening {}", dir.display()))?;
    let dim = store.fingerprint().dim;
    let root = store.add_root(Path::new(PADDING_ROOT))?;
    let source = ClusteredSource::new(7, dim, 1_000, 0.03);
    for (chunk, start) in (0..count).step_by(COMMIT_SIZE).enumerate() {
        let n = COMMIT_SIZE.min(count - start);
        let vectors = source.sample(chunk as u64, n);
        let upserts = vectors
            .chunks_exact(dim)
            .enumerate()
            .map(|(j, embedding)| Upsert {
                replaces: None,
                record: padding_record(root, start + j),
                embedding: embedding.to_vec(),
            })
            .collect();
        store.commit(ChangeSet {
            upserts,
            ..ChangeSet::default()
        })?;
    }
    store.save_index()?;
    println!(
        "padded {} with {count} synthetic images in {:.1} s; it now holds {}",
        dir.display(),
        started.elapsed().as_secs_f64(),
        store.len()
    );
    Ok(())
}

fn padding_record(root: u32, i: usize) -> ImageRecord {
    // Distinct hashes that no real file has: a marker byte and the index.
    let mut content_hash = [0xA5u8; 32];
    content_hash[..8].copy_from_slice(&(i as u64).to_le_bytes());
    ImageRecord {
        root,
        rel_path: format!("padding/{i:07}.jpg"),
        byte_size: 0,
        modified_unix_ns: 0,
        content_hash,
        pixel_hash: content_hash,
        width: 224,
        height: 224,
        split: Some("train".into()),
        label: Some("padding".into()),
    }
}
