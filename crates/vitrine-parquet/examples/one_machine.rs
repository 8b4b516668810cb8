//! How far one machine goes, and what a merge costs: POINTS synthetic clustered
//! 384-dimensional unit vectors (1,000 centres, noise 0.03) with records, then
//! - written as one shard file (time, size);
//! - merged into a new store by `ShardMerge` (what `vitrine merge` runs), against the same
//!   records and vectors committed the way an index run commits (64 images a commit, then the
//!   graph saved): time and peak memory of each, each in a process of its own;
//! - the merged store's size on disk, the time to open it and the memory of a process that
//!   opens it and answers searches, and search latency (k 10, ef_search 64, median and 99th
//!   percentile over QUERIES queries) beside an exact brute-force scan of the same vectors in
//!   the same run (the reference), with recall@10 against that scan.
//!
//! Run (release):
//!   cargo run --release -p vitrine-parquet --example one_machine [-- POINTS QUERIES]

#[path = "../../vitrine-store/tests/common/synthetic.rs"]
mod synthetic;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use anyhow::{bail, Context};
use serde_json::{json, Value};
use synthetic::{exact_top_k, recall_at_k, ClusteredSource};
use vitrine_engine::progress::Progress;
use vitrine_engine::shards::{Shard, ShardImage, ShardMerge};
use vitrine_store::{ChangeSet, ImageRecord, ModelFingerprint, Store, Upsert};

const DIM: usize = 384;
const K: usize = 10;
/// What an index run commits at a time (`index.commit_every`'s default).
const INDEX_COMMIT: usize = 64;

fn fingerprint() -> ModelFingerprint {
    ModelFingerprint {
        model_id: "synthetic".into(),
        weights_sha256: "00".repeat(32),
        preprocess: "{}".into(),
        pooling: "cls".into(),
        dim: DIM,
    }
}

fn record(i: usize) -> ImageRecord {
    let mut hash = [0u8; 32];
    hash[..8].copy_from_slice(&(i as u64).to_le_bytes());
    ImageRecord {
        root: 0,
        rel_path: format!("shelf/{:03}/{i:07}.jpg", i % 1000),
        byte_size: 100_000 + i as u64,
        modified_unix_ns: 1_700_000_000_000_000_000,
        content_hash: hash,
        pixel_hash: hash,
        width: 640,
        height: 480,
        split: Some(["train", "val", "test"][i % 3].into()),
        label: Some(format!("label-{}", i % 50)),
    }
}

fn vectors(points: usize) -> Vec<f32> {
    ClusteredSource::new(0, DIM, 1_000, 0.03).sample(1, points)
}

fn queries(count: usize) -> Vec<f32> {
    ClusteredSource::new(0, DIM, 1_000, 0.03).sample(2, count)
}

struct Silent;
impl Progress for Silent {
    fn begin(&self, _: &str, _: u64) {}
    fn advance(&self, _: u64) {}
    fn finish(&self) {}
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.first().map(String::as_str) {
        Some("--merge") => return merge(Path::new(&args[1]), Path::new(&args[2])),
        Some("--commit") => return commit(args[1].parse()?, Path::new(&args[2])),
        Some("--serve") => return serve(Path::new(&args[1]), args[2].parse()?),
        _ => {}
    }
    let points: usize = args.first().map_or(Ok(1_000_000), |a| a.parse())?;
    let query_count: usize = args.get(1).map_or(Ok(200), |a| a.parse())?;
    let work = tempfile::tempdir()?;
    let shard_file = work.path().join("part-0-of-1.parquet");

    let data = vectors(points);
    let shard = Shard {
        fingerprint: fingerprint(),
        part: None,
        roots: vec![PathBuf::from("/data/photos")],
        images: data
            .chunks_exact(DIM)
            .enumerate()
            .map(|(i, v)| ShardImage {
                record: record(i),
                embedding: v.to_vec(),
            })
            .collect(),
        failures: Vec::new(),
    };
    let started = Instant::now();
    vitrine_parquet::write_shard(&shard_file, &shard)?;
    let write_s = started.elapsed().as_secs_f64();
    drop(shard);
    let shard_bytes = std::fs::metadata(&shard_file)?.len();

    let merged = work.path().join("merged");
    let merge_run = child(&["--merge", path(&shard_file), path(&merged)])?;
    let committed = work.path().join("committed");
    let commit_run = child(&["--commit", &points.to_string(), path(&committed)])?;
    std::fs::remove_dir_all(&committed)?;
    let disk = folder_bytes(&merged)?;
    let served = child(&["--serve", path(&merged), &query_count.to_string()])?;

    let query_vectors = queries(query_count);
    let started = Instant::now();
    let truth = exact_top_k(&data, &query_vectors, DIM, K);
    let exact_ms = started.elapsed().as_secs_f64() * 1e3 / query_count as f64;
    let found: Vec<Vec<usize>> = serde_json::from_value(served["found"].clone())?;
    let recall = recall_at_k(&found, &truth, K);

    let gb = |v: &Value| v.as_f64().unwrap_or(f64::NAN) / 1e9;
    println!("## {points} x {DIM} synthetic vectors, one store");
    println!("| step | time | peak memory |");
    println!("|---|---:|---:|");
    println!(
        "| write one shard file ({:.2} GB) | {write_s:.1} s | (the benchmark's own process) |",
        shard_bytes as f64 / 1e9
    );
    println!(
        "| `merge` it into a new store | {:.1} s | {:.2} GB |",
        merge_run["seconds"].as_f64().unwrap_or(f64::NAN),
        gb(&merge_run["peak_bytes"])
    );
    println!(
        "| the same store through index-run commits ({INDEX_COMMIT} a commit) | {:.1} s | {:.2} GB |",
        commit_run["seconds"].as_f64().unwrap_or(f64::NAN),
        gb(&commit_run["peak_bytes"])
    );
    println!();
    println!("| serving the store | value |");
    println!("|---|---:|");
    println!(
        "| on disk | {:.2} GB ({:.2} MB per 1,000 images) |",
        disk as f64 / 1e9,
        disk as f64 / 1e6 / (points as f64 / 1e3)
    );
    println!(
        "| open (load the saved graph) | {:.2} s |",
        served["open_s"].as_f64().unwrap_or(f64::NAN)
    );
    println!(
        "| resident memory after open and searches | {:.2} GB |",
        gb(&served["rss_bytes"])
    );
    println!(
        "| search latency k {K}, median / p99 | {:.3} / {:.3} ms |",
        served["p50_ms"].as_f64().unwrap_or(f64::NAN),
        served["p99_ms"].as_f64().unwrap_or(f64::NAN)
    );
    println!("| exact scan (reference), both cores: wall time per query | {exact_ms:.1} ms |");
    println!("| recall@10 against the exact scan | {recall:.4} |");
    Ok(())
}

fn path(p: &Path) -> &str {
    p.to_str().expect("temporary paths are UTF-8")
}

/// Runs this example in one of its modes and reads the JSON it prints.
fn child(args: &[&str]) -> anyhow::Result<Value> {
    let output = Command::new(std::env::current_exe()?).args(args).output()?;
    if !output.status.success() {
        bail!("{args:?}: {}", String::from_utf8_lossy(&output.stderr));
    }
    Ok(serde_json::from_slice(&output.stdout)?)
}

fn merge(file: &Path, dir: &Path) -> anyhow::Result<()> {
    let started = Instant::now();
    let shard = vitrine_parquet::read_shard(file)?;
    let mut store = Store::create_or_open(dir, &shard.fingerprint)?;
    let mut merging = ShardMerge::new(&mut store, INDEX_COMMIT)?;
    merging.add(&shard, &Silent)?;
    merging.finish()?;
    report_run(started)
}

fn commit(points: usize, dir: &Path) -> anyhow::Result<()> {
    let data = vectors(points);
    let started = Instant::now();
    let mut store = Store::create_or_open(dir, &fingerprint())?;
    store.add_root(Path::new("/data/photos"))?;
    for (chunk_index, chunk) in data.chunks(INDEX_COMMIT * DIM).enumerate() {
        let upserts = chunk
            .chunks_exact(DIM)
            .enumerate()
            .map(|(j, v)| Upsert {
                replaces: None,
                record: record(chunk_index * INDEX_COMMIT + j),
                embedding: v.to_vec(),
            })
            .collect();
        store.commit(ChangeSet {
            upserts,
            ..ChangeSet::default()
        })?;
    }
    store.save_index()?;
    report_run(started)
}

fn report_run(started: Instant) -> anyhow::Result<()> {
    let report = json!({
        "seconds": started.elapsed().as_secs_f64(),
        "peak_bytes": status_bytes("VmHWM:")?,
    });
    println!("{report}");
    Ok(())
}

/// Opens the store, searches the benchmark's queries one by one, prints JSON
/// with the rows found (read back from the records' paths).
fn serve(dir: &Path, query_count: usize) -> anyhow::Result<()> {
    let started = Instant::now();
    let store = Store::open(dir)?;
    let open_s = started.elapsed().as_secs_f64();
    if !store.index_was_loaded() {
        bail!("the saved graph was rebuilt instead of loaded");
    }
    let mut row_of = std::collections::HashMap::new();
    for entry in store.records() {
        let (id, record) = entry?;
        let name = record.rel_path.rsplit('/').next().unwrap_or_default();
        let row: usize = name.trim_end_matches(".jpg").parse()?;
        row_of.insert(id, row);
    }
    let query_vectors = queries(query_count);
    let mut latencies = Vec::with_capacity(query_count);
    let mut found = Vec::with_capacity(query_count);
    for query in query_vectors.chunks_exact(DIM) {
        let started = Instant::now();
        let hits = store.search(query, K, None)?;
        latencies.push(started.elapsed().as_secs_f64() * 1e3);
        found.push(
            hits.iter()
                .map(|(id, _)| row_of[id])
                .collect::<Vec<usize>>(),
        );
    }
    latencies.sort_by(f64::total_cmp);
    let percentile = |p: f64| latencies[((latencies.len() - 1) as f64 * p).round() as usize];
    drop(row_of);
    let report = json!({
        "open_s": open_s,
        "p50_ms": percentile(0.5),
        "p99_ms": percentile(0.99),
        "rss_bytes": status_bytes("VmRSS:")?,
        "found": found,
    });
    println!("{report}");
    Ok(())
}

/// A size from /proc/self/status, in bytes.
fn status_bytes(field: &str) -> anyhow::Result<u64> {
    let status = std::fs::read_to_string("/proc/self/status")?;
    let line = status
        .lines()
        .find(|l| l.starts_with(field))
        .with_context(|| format!("no {field} in /proc/self/status"))?;
    let kb: u64 = line.split_whitespace().nth(1).context("a value")?.parse()?;
    Ok(kb * 1024)
}

fn folder_bytes(dir: &Path) -> anyhow::Result<u64> {
    let mut total = 0;
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        let meta = entry.metadata()?;
        total += if meta.is_dir() {
            folder_bytes(&entry.path())?
        } else {
            meta.len()
        };
    }
    Ok(total)
}
