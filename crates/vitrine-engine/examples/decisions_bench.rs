//! Recording decisions and exporting the clean training list on a large
//! collection, beside two floors measured in the same run: the durable
//! append alone (sled insert + flush, what a decision cannot do without) and
//! Python's csv module writing the same rows (needs $VITRINE_PYTHON, else
//! `python3`). Synthetic records with 8-dimensional vectors: the costs under
//! test do not depend on the embedding. Medians and 99th percentiles.
//!
//! cargo run -p vitrine-engine --example decisions_bench -- [IMAGES] [DECISIONS]

use std::path::Path;
use std::process::Command;
use std::time::Instant;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use vitrine_engine::catalog::Catalog;
use vitrine_engine::decisions::{self, DecisionState, Request};
use vitrine_store::{ChangeSet, ImageRecord, ModelFingerprint, Store, Upsert};

const DIM: usize = 8;
const SPLITS: [&str; 3] = ["train", "val", "test"];

fn record(i: usize) -> ImageRecord {
    let mut content_hash = [0u8; 32];
    content_hash[..8].copy_from_slice(&(i as u64).to_le_bytes());
    let split = SPLITS[i % 3];
    ImageRecord {
        root: 0,
        rel_path: format!("{split}/class-{:02}/{i:06}.jpg", i % 40),
        byte_size: 50_000 + i as u64,
        modified_unix_ns: 1_700_000_000_000_000_000,
        content_hash,
        pixel_hash: content_hash,
        width: 640,
        height: 480,
        split: Some(split.into()),
        label: Some(format!("class-{:02}", i % 40)),
    }
}

fn collection(dir: &Path, images: usize, rng: &mut ChaCha8Rng) -> Store {
    let fingerprint = ModelFingerprint {
        model_id: "bench".into(),
        weights_sha256: "0".repeat(64),
        preprocess: "none".into(),
        pooling: "cls".into(),
        dim: DIM,
    };
    let mut store = Store::create_or_open(dir, &fingerprint).expect("create store");
    store.add_root(Path::new("/data/photos")).expect("add root");
    for start in (0..images).step_by(10_000) {
        let upserts = (start..(start + 10_000).min(images))
            .map(|i| {
                let mut v: Vec<f32> = (0..DIM).map(|_| rng.random::<f32>() - 0.5).collect();
                let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
                v.iter_mut().for_each(|x| *x /= norm);
                Upsert {
                    replaces: None,
                    record: record(i),
                    embedding: v,
                }
            })
            .collect();
        store
            .commit(ChangeSet {
                upserts,
                ..ChangeSet::default()
            })
            .expect("commit");
    }
    store
}

/// Median and 99th percentile of `samples`, in milliseconds.
fn quantiles(mut samples: Vec<f64>) -> (f64, f64) {
    samples.sort_by(f64::total_cmp);
    let at = |q: f64| samples[((samples.len() - 1) as f64 * q).round() as usize];
    (at(0.5), at(0.99))
}

fn millis(started: Instant) -> f64 {
    started.elapsed().as_secs_f64() * 1e3
}

/// Python's csv module writing `rows` rows of this collection's shape; the
/// median of 5 runs in milliseconds, timed inside Python.
fn python_csv_ms(rows: usize) -> Option<f64> {
    let python = std::env::var("VITRINE_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = format!(
        "import csv, io, time, statistics\n\
         rows = [(f'{{s}}/class-{{i % 40:02}}/{{i:06}}.jpg', s, f'class-{{i % 40:02}}') \
         for i in range({rows}) for s in [('train', 'val', 'test')[i % 3]]]\n\
         times = []\n\
         for _ in range(5):\n\
         \x20   t = time.perf_counter(); out = io.StringIO(); w = csv.writer(out)\n\
         \x20   w.writerow(['path', 'split', 'label']); w.writerows(rows); out.getvalue().encode()\n\
         \x20   times.append((time.perf_counter() - t) * 1e3)\n\
         print(statistics.median(times))\n"
    );
    let output = Command::new(python).args(["-c", &script]).output().ok()?;
    String::from_utf8(output.stdout).ok()?.trim().parse().ok()
}

fn main() {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| a.parse().expect("IMAGES and DECISIONS are counts"))
        .collect();
    let images = args.first().copied().unwrap_or(100_000);
    let decisions_wanted = args.get(1).copied().unwrap_or(4_000);
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let dir = tempfile::tempdir().expect("temporary folder");

    let started = Instant::now();
    let store = collection(dir.path(), images, &mut rng);
    let catalog = Catalog::load(&store).expect("catalog");
    eprintln!(
        "collection of {images} images built in {:.1} s",
        started.elapsed().as_secs_f64()
    );

    // Each decision as a reviewer makes it: a path from a report, checked
    // against the decision number the reviewer saw (known from the report,
    // so looked up outside the timing), then appended durably.
    // The log is replayed once, as the service does, and kept up to date.
    let mut state = DecisionState::load(&store, &catalog).expect("log");
    let mut record_ms = Vec::with_capacity(decisions_wanted);
    for n in 0..decisions_wanted {
        let row = rng.random_range(0..images);
        let path = catalog.records[row].rel_path.clone();
        let request = if n % 10 == 9 {
            let other = catalog.records[rng.random_range(0..images)]
                .rel_path
                .clone();
            Request::Distinct {
                first: path,
                second: other,
            }
        } else {
            Request::Drop { path }
        };
        let seen = state.latest_on(&[catalog.ids[row]], &catalog);
        let started = Instant::now();
        let action = request.resolve(&catalog).expect("known paths");
        match decisions::record(&store, &catalog, &mut state, "bench", action, Some(seen)) {
            // A distinct pair's second image may carry decisions: a conflict
            // is an answer too.
            Ok(_) | Err(vitrine_engine::EngineError::DecisionConflict { .. }) => {}
            Err(err) => panic!("{err}"),
        }
        record_ms.push(millis(started));
    }
    let mut export_ms = Vec::new();
    let mut bytes = 0;
    for _ in 0..5 {
        let started = Instant::now();
        let rows = decisions::clean_manifest(&catalog, &state);
        let mut csv = Vec::new();
        decisions::write_manifest(&rows, &mut csv).expect("write");
        export_ms.push(millis(started));
        bytes = csv.len();
    }
    // Last: these entries are not decisions, so nothing reads the log after.
    let mut append_ms = Vec::with_capacity(decisions_wanted);
    for _ in 0..decisions_wanted {
        let started = Instant::now();
        store.append_decision(b"{}").expect("append");
        append_ms.push(millis(started));
    }

    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|info| {
            info.lines()
                .find(|l| l.starts_with("model name"))
                .map(|l| l.split(':').nth(1).unwrap_or("").trim().to_owned())
        })
        .unwrap_or_default();
    println!(
        "{images} images, {decisions_wanted} decisions; {cpu}, {} threads",
        rayon::current_num_threads()
    );
    println!();
    let (record_p50, record_p99) = quantiles(record_ms);
    let (append_p50, append_p99) = quantiles(append_ms);
    println!(
        "| step | vitrine median ms | vitrine p99 ms | floor median ms | floor p99 ms | floor |"
    );
    println!("|---|---|---|---|---|---|");
    println!(
        "| record a decision (resolve, check `seen`, append, flush) | {record_p50:.2} | {record_p99:.2} | {append_p50:.2} | {append_p99:.2} | sled insert + flush |"
    );
    let (export_p50, _) = quantiles(export_ms);
    let python = python_csv_ms(images).map_or("n/a".into(), |ms| format!("{ms:.1}"));
    println!(
        "| export the training list ({bytes} bytes) | {export_p50:.1} | - | {python} | - | Python csv.writer, same rows |"
    );
}
