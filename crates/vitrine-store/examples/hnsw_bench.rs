//! HNSW benchmark: the store's graph (hnsw_rs with `CosineDistance`) against hnswlib,
//! one thread each, same vectors, same M and ef_construction.
//!
//! Run (release):
//!   VITRINE_PYTHON=/work/pyenv/bin/python \
//!     cargo run --release -p vitrine-store --example hnsw_bench [-- POINTS QUERIES]
//!
//! For two synthetic data sets of clustered 384-dimensional unit vectors it prints the
//! build time, recall@10 and median queries/s over an ef_search sweep for both
//! libraries, then the cheapest ef_search reaching recall@10 >= 0.95 and >= 0.99.

#[path = "../tests/common/synthetic.rs"]
mod synthetic;

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::Path;
use std::process::Command;
use std::time::Instant;

use anyhow::{bail, Context};
use hnsw_rs::prelude::Hnsw;
use synthetic::{exact_top_k, recall_at_k, ClusteredSource};
use vitrine_store::{CosineDistance, HnswParams};

const DIM: usize = 384;
const K: usize = 10;
const REPEATS: usize = 5;
const EF_SWEEP: [usize; 12] = [10, 16, 24, 32, 48, 64, 96, 128, 192, 256, 384, 512];
const TARGETS: [f64; 2] = [0.95, 0.99];

struct Dataset {
    name: &'static str,
    centres: usize,
    noise_std: f32,
}

const DATASETS: [Dataset; 2] = [
    Dataset {
        name: "1000 centres, noise 0.03",
        centres: 1_000,
        noise_std: 0.03,
    },
    Dataset {
        name: "100 centres, noise 0.06",
        centres: 100,
        noise_std: 0.06,
    },
];

struct SweepPoint {
    ef: usize,
    recall: f64,
    qps: f64,
}

struct Run {
    build_s: f64,
    sweep: Vec<SweepPoint>,
}

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let points: usize = args.next().map_or(Ok(100_000), |a| a.parse())?;
    let queries_n: usize = args.next().map_or(Ok(1_000), |a| a.parse())?;
    let python = std::env::var("VITRINE_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("examples/hnswlib_reference.py");
    let params = HnswParams::default();
    let work = tempfile::tempdir()?;

    for (seed, dataset) in (0u64..).step_by(10).zip(&DATASETS) {
        let source = ClusteredSource::new(seed, DIM, dataset.centres, dataset.noise_std);
        let data = source.sample(seed + 1, points);
        let queries = source.sample(seed + 2, queries_n);
        let truth = exact_top_k(&data, &queries, DIM, K);
        write_npy_f32(&work.path().join("data.npy"), &data, points, DIM)?;
        write_npy_f32(&work.path().join("queries.npy"), &queries, queries_n, DIM)?;
        let truth_flat: Vec<i64> = truth.iter().flatten().map(|&r| r as i64).collect();
        write_npy_i64(&work.path().join("truth.npy"), &truth_flat, queries_n, K)?;

        let ours = run_hnsw_rs(&data, &queries, &truth, &params);
        let reference = run_hnswlib(&python, &script, work.path(), &params)?;
        print_report(dataset, points, queries_n, &params, &ours, &reference);
    }
    Ok(())
}

fn run_hnsw_rs(data: &[f32], queries: &[f32], truth: &[Vec<usize>], params: &HnswParams) -> Run {
    let points = data.len() / DIM;
    let hnsw = Hnsw::<f32, CosineDistance>::new(
        params.max_nb_connection,
        points,
        16,
        params.ef_construction,
        CosineDistance,
    );
    let started = Instant::now();
    for (id, row) in data.chunks_exact(DIM).enumerate() {
        hnsw.insert_slice((row, id));
    }
    let build_s = started.elapsed().as_secs_f64();

    let sweep = EF_SWEEP
        .iter()
        .map(|&ef| {
            let mut rates = Vec::with_capacity(REPEATS);
            let mut found = Vec::new();
            for _ in 0..REPEATS {
                let started = Instant::now();
                found = queries
                    .chunks_exact(DIM)
                    .map(|q| hnsw.search(q, K, ef).iter().map(|n| n.d_id).collect())
                    .collect::<Vec<Vec<usize>>>();
                rates.push(found.len() as f64 / started.elapsed().as_secs_f64());
            }
            SweepPoint {
                ef,
                recall: recall_at_k(&found, truth, K),
                qps: median(rates),
            }
        })
        .collect();
    Run { build_s, sweep }
}

fn run_hnswlib(
    python: &str,
    script: &Path,
    dir: &Path,
    params: &HnswParams,
) -> anyhow::Result<Run> {
    let output = Command::new(python)
        .arg(script)
        .arg(dir)
        .arg(params.max_nb_connection.to_string())
        .arg(params.ef_construction.to_string())
        .arg(REPEATS.to_string())
        .args(EF_SWEEP.iter().map(|ef| ef.to_string()))
        .output()
        .with_context(|| format!("running {python} {}", script.display()))?;
    if !output.status.success() {
        bail!(
            "hnswlib reference failed: {}",
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let json: serde_json::Value = serde_json::from_slice(&output.stdout)?;
    let number = |v: &serde_json::Value, field: &str| {
        v[field]
            .as_f64()
            .with_context(|| format!("hnswlib output lacks {field}"))
    };
    let sweep = json["sweep"]
        .as_array()
        .context("hnswlib output lacks sweep")?
        .iter()
        .map(|p| {
            Ok(SweepPoint {
                ef: number(p, "ef")? as usize,
                recall: number(p, "recall")?,
                qps: number(p, "qps")?,
            })
        })
        .collect::<anyhow::Result<_>>()?;
    Ok(Run {
        build_s: number(&json, "build_s")?,
        sweep,
    })
}

fn print_report(
    dataset: &Dataset,
    points: usize,
    queries: usize,
    params: &HnswParams,
    ours: &Run,
    reference: &Run,
) {
    println!(
        "\n## {} — {points} x {DIM}, {queries} queries, k={K}, M={}, ef_construction={}, \
         1 thread, queries/s = median of {REPEATS}",
        dataset.name, params.max_nb_connection, params.ef_construction
    );
    println!(
        "build: hnsw_rs {:.1} s, hnswlib {:.1} s, ratio hnsw_rs/hnswlib {:.2}",
        ours.build_s,
        reference.build_s,
        ours.build_s / reference.build_s
    );
    println!(
        "{:>6} | {:>14} {:>14} | {:>14} {:>14} | {:>9}",
        "ef", "hnsw_rs recall", "hnsw_rs q/s", "hnswlib recall", "hnswlib q/s", "q/s ratio"
    );
    for (a, b) in ours.sweep.iter().zip(&reference.sweep) {
        println!(
            "{:>6} | {:>14.4} {:>14.0} | {:>14.4} {:>14.0} | {:>9.2}",
            a.ef,
            a.recall,
            a.qps,
            b.recall,
            b.qps,
            a.qps / b.qps
        );
    }
    for target in TARGETS {
        let cheapest = |run: &Run| {
            run.sweep
                .iter()
                .find(|p| p.recall >= target)
                .map(|p| (p.ef, p.qps))
        };
        match (cheapest(ours), cheapest(reference)) {
            (Some((ef_a, qps_a)), Some((ef_b, qps_b))) => println!(
                "recall@{K} >= {target}: hnsw_rs ef {ef_a} at {qps_a:.0} q/s, hnswlib ef {ef_b} \
                 at {qps_b:.0} q/s, ratio {:.2}",
                qps_a / qps_b
            ),
            (a, b) => println!(
                "recall@{K} >= {target}: hnsw_rs {}, hnswlib {}",
                describe(a),
                describe(b)
            ),
        }
    }
}

fn describe(point: Option<(usize, f64)>) -> String {
    match point {
        Some((ef, qps)) => format!("ef {ef} at {qps:.0} q/s"),
        None => format!("not reached by ef {}", EF_SWEEP[EF_SWEEP.len() - 1]),
    }
}

fn median(mut values: Vec<f64>) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

/// Writes a C-order .npy file (NumPy format version 1.0).
fn write_npy(
    path: &Path,
    descr: &str,
    rows: usize,
    cols: usize,
    body: &[u8],
) -> anyhow::Result<()> {
    let mut header =
        format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': ({rows}, {cols}), }}");
    // magic (6) + version (2) + header length (2) + header, padded to 64 bytes with '\n' last.
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat(unpadded.next_multiple_of(64) - unpadded));
    header.push('\n');
    let mut out = BufWriter::new(File::create(path)?);
    out.write_all(b"\x93NUMPY\x01\x00")?;
    out.write_all(&u16::try_from(header.len())?.to_le_bytes())?;
    out.write_all(header.as_bytes())?;
    out.write_all(body)?;
    out.flush()?;
    Ok(())
}

fn write_npy_f32(path: &Path, values: &[f32], rows: usize, cols: usize) -> anyhow::Result<()> {
    let body: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
    write_npy(path, "<f4", rows, cols, &body)
}

fn write_npy_i64(path: &Path, values: &[i64], rows: usize, cols: usize) -> anyhow::Result<()> {
    let body: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
    write_npy(path, "<i8", rows, cols, &body)
}
