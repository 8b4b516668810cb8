//! HNSW benchmark: the store's graph (built by `construct.rs`, searched in its compact
//! form) against hnswlib, one thread each, same vectors, same M and ef_construction.
//!
//! Run (release):
//!   VITRINE_PYTHON=.venv/bin/python \
//!     cargo run --release -p vitrine-store --example hnsw_bench [-- POINTS QUERIES]
//!
//! For two synthetic data sets of clustered 384-dimensional unit vectors it prints the
//! build time, recall@10 and median queries/s over an ef_search sweep for both
//! libraries, then the cheapest ef_search reaching recall@10 >= 0.95 and >= 0.99.
//! hnswlib runs in a Python process driven step by step, and every build and every
//! query pass alternates between the two, so that a slow spell of the machine (a
//! shared virtual machine's are long and frequent) hits both sides. For
//! the first data set it also fills a store with the vectors (commits of 10,000 on
//! every core, as indexing does), saves it and times opening it, against hnswlib's
//! reload of its saved index.

#[path = "../tests/common/mod.rs"]
mod common;

use std::fs::File;
use std::io::{BufRead, BufReader, BufWriter, Write};
use std::path::Path;
use std::process::{Child, ChildStdin, ChildStdout, Command, Stdio};
use std::time::Instant;

use anyhow::{bail, Context};
use common::synthetic::{exact_top_k, recall_at_k, ClusteredSource};
use vitrine_store::{Graph, HnswParams, ImageId, Store};

const DIM: usize = 384;
const K: usize = 10;
const REPEATS: usize = 5;
const BUILDS: usize = 3;
const OPEN_REPEATS: usize = 3;
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
    let one_thread = rayon::ThreadPoolBuilder::new().num_threads(1).build()?;

    for (seed, dataset) in (0u64..).step_by(10).zip(&DATASETS) {
        let source = ClusteredSource::new(seed, DIM, dataset.centres, dataset.noise_std);
        let data = source.sample(seed + 1, points);
        let queries = source.sample(seed + 2, queries_n);
        let truth = exact_top_k(&data, &queries, DIM, K);
        write_npy_f32(&work.path().join("data.npy"), &data, points, DIM)?;
        write_npy_f32(&work.path().join("queries.npy"), &queries, queries_n, DIM)?;
        let truth_flat: Vec<i64> = truth.iter().flatten().map(|&r| r as i64).collect();
        write_npy_i64(&work.path().join("truth.npy"), &truth_flat, queries_n, K)?;

        let mut hnswlib = Hnswlib::start(&python, &script, work.path(), &params)?;
        let (ours, reference) =
            one_thread.install(|| compare(&data, &queries, &truth, &params, &mut hnswlib))?;
        print_report(dataset, points, queries_n, &params, &ours, &reference);
        if seed == 0 {
            let store_dir = work.path().join("store");
            let open = measure_open(&store_dir, &data)?;
            let mut loads = Vec::with_capacity(OPEN_REPEATS);
            for _ in 0..OPEN_REPEATS {
                loads.push(hnswlib.ask("load", "load_s")?);
            }
            print_open_report(points, &open, median(loads));
            std::fs::remove_dir_all(&store_dir)?;
        }
    }
    Ok(())
}

/// Builds both graphs `BUILDS` times, then sweeps ef_search, alternating between
/// vitrine and hnswlib at every step; times are medians.
fn compare(
    data: &[f32],
    queries: &[f32],
    truth: &[Vec<usize>],
    params: &HnswParams,
    hnswlib: &mut Hnswlib,
) -> anyhow::Result<(Run, Run)> {
    let items: Vec<(ImageId, &[f32])> = data
        .chunks_exact(DIM)
        .enumerate()
        .map(|(id, row)| (id as ImageId, row))
        .collect();
    let mut graph = None;
    let (mut our_builds, mut their_builds) = (Vec::new(), Vec::new());
    for _ in 0..BUILDS {
        drop(graph.take());
        let started = Instant::now();
        let built = Graph::build(params, DIM, &items);
        // The first search freezes the layers into the compact form: part of the build.
        built.search(&queries[..DIM], K, None);
        our_builds.push(started.elapsed().as_secs_f64());
        graph = Some(built);
        their_builds.push(hnswlib.ask("build", "build_s")?);
    }
    let graph = graph.expect("built at least once");

    let (mut our_sweep, mut their_sweep) = (Vec::new(), Vec::new());
    for &ef in &EF_SWEEP {
        let (mut our_rates, mut their_rates) = (Vec::new(), Vec::new());
        let (mut found, mut their_recall) = (Vec::new(), 0.0);
        for _ in 0..REPEATS {
            let started = Instant::now();
            found = queries
                .chunks_exact(DIM)
                .map(|q| {
                    let hits = graph.search(q, ef.max(K), None);
                    hits.iter().take(K).map(|(id, _)| *id as usize).collect()
                })
                .collect::<Vec<Vec<usize>>>();
            our_rates.push(found.len() as f64 / started.elapsed().as_secs_f64());
            let pass = hnswlib.ask_json(&format!("search {ef}"))?;
            their_rates.push(number(&pass, "qps")?);
            their_recall = number(&pass, "recall")?;
        }
        our_sweep.push(SweepPoint {
            ef,
            recall: recall_at_k(&found, truth, K),
            qps: median(our_rates),
        });
        their_sweep.push(SweepPoint {
            ef,
            recall: their_recall,
            qps: median(their_rates),
        });
    }
    Ok((
        Run {
            build_s: median(our_builds),
            sweep: our_sweep,
        },
        Run {
            build_s: median(their_builds),
            sweep: their_sweep,
        },
    ))
}

/// `hnswlib_reference.py`, answering one command per line.
struct Hnswlib {
    child: Child,
    input: Option<ChildStdin>,
    output: BufReader<ChildStdout>,
}

impl Hnswlib {
    fn start(
        python: &str,
        script: &Path,
        dir: &Path,
        params: &HnswParams,
    ) -> anyhow::Result<Hnswlib> {
        let mut child = Command::new(python)
            .arg(script)
            .arg(dir)
            .arg(params.max_nb_connection.to_string())
            .arg(params.ef_construction.to_string())
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .spawn()
            .with_context(|| format!("running {python} {}", script.display()))?;
        let input = child.stdin.take();
        let output = BufReader::new(child.stdout.take().context("no stdout")?);
        Ok(Hnswlib {
            child,
            input,
            output,
        })
    }

    fn ask_json(&mut self, command: &str) -> anyhow::Result<serde_json::Value> {
        let input = self.input.as_mut().context("hnswlib reference closed")?;
        writeln!(input, "{command}")?;
        input.flush()?;
        let mut line = String::new();
        if self.output.read_line(&mut line)? == 0 {
            bail!("hnswlib reference exited during {command:?} (its error is above)");
        }
        Ok(serde_json::from_str(&line)?)
    }

    fn ask(&mut self, command: &str, field: &str) -> anyhow::Result<f64> {
        number(&self.ask_json(command)?, field)
    }
}

impl Drop for Hnswlib {
    fn drop(&mut self) {
        drop(self.input.take());
        let _ = self.child.wait();
    }
}

fn number(value: &serde_json::Value, field: &str) -> anyhow::Result<f64> {
    value[field]
        .as_f64()
        .with_context(|| format!("hnswlib answer lacks {field}"))
}

struct OpenTimes {
    fill_s: f64,
    save_s: f64,
    open_s: f64,
    first_search_s: f64,
}

/// Fills a store with `data`, saves it, then times `Store::open` and the first search
/// after it.
fn measure_open(dir: &Path, data: &[f32]) -> anyhow::Result<OpenTimes> {
    let started = Instant::now();
    let (mut store, _) = common::populated_store(dir, data, DIM);
    let fill_s = started.elapsed().as_secs_f64();
    let started = Instant::now();
    store.save_index()?;
    let save_s = started.elapsed().as_secs_f64();
    drop(store);

    let mut opens = Vec::with_capacity(OPEN_REPEATS);
    let mut first_searches = Vec::with_capacity(OPEN_REPEATS);
    for _ in 0..OPEN_REPEATS {
        let started = Instant::now();
        let store = Store::open(dir)?;
        opens.push(started.elapsed().as_secs_f64());
        if !store.index_was_loaded() {
            bail!("the saved graph was rebuilt instead of loaded");
        }
        let started = Instant::now();
        store.search(&data[..DIM], K, None)?;
        first_searches.push(started.elapsed().as_secs_f64());
    }

    Ok(OpenTimes {
        fill_s,
        save_s,
        open_s: median(opens),
        first_search_s: median(first_searches),
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
        "build (median of {BUILDS}): vitrine (insertion + compact copy) {:.1} s, hnswlib \
         {:.1} s, ratio vitrine/hnswlib {:.2}",
        ours.build_s,
        reference.build_s,
        ours.build_s / reference.build_s
    );
    println!(
        "{:>6} | {:>14} {:>14} | {:>14} {:>14} | {:>9}",
        "ef", "vitrine recall", "vitrine q/s", "hnswlib recall", "hnswlib q/s", "q/s ratio"
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
                "recall@{K} >= {target}: vitrine ef {ef_a} at {qps_a:.0} q/s, hnswlib ef {ef_b} \
                 at {qps_b:.0} q/s, ratio {:.2}",
                qps_a / qps_b
            ),
            (a, b) => println!(
                "recall@{K} >= {target}: vitrine {}, hnswlib {}",
                describe(a),
                describe(b)
            ),
        }
    }
}

fn print_open_report(points: usize, open: &OpenTimes, hnswlib_load_s: f64) {
    println!("\n## Store of {points} images, saved and reopened, median of {OPEN_REPEATS}");
    println!(
        "fill (commits of 10,000, all cores): {:.1} s; save: {:.1} s",
        open.fill_s, open.save_s
    );
    println!(
        "open: vitrine Store::open {:.2} s (then first search {:.1} ms); hnswlib load_index \
         {hnswlib_load_s:.2} s",
        open.open_s,
        open.first_search_s * 1e3,
    );
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
