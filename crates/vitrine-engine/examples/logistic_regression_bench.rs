//! Training time of our multinomial logistic regression on synthetic unit embeddings, beside
//! scikit-learn's `LogisticRegression` (lbfgs) on the same data and settings, when
//! `VITRINE_PYTHON` names a Python with scikit-learn. Prints a markdown table of medians of
//! three runs, with the final objective of each (the same function, so lower is closer to the
//! optimum) and how far scikit-learn's probabilities are from ours.
//!
//! cargo run --release -p vitrine-engine --example logistic_regression_bench -- [N]

use std::io::Write;
use std::process::Command;
use std::time::Instant;

use anyhow::{bail, Context, Result};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use vitrine_engine::analytics::{
    fit_logistic_regression, top_class_outcomes, LogisticFit, LogisticRegressionOptions,
};

const DIM: usize = 384;
const N_CLASSES: usize = 10;
const RUNS: usize = 3;
/// Width of the uniform noise added to each coordinate of a class direction before
/// normalising: the classes overlap, about nine in ten training labels are predicted.
const NOISE: f32 = 1.0;
/// Rows whose probabilities are compared with scikit-learn's.
const COMPARED_ROWS: usize = 2000;

/// Fits scikit-learn on the raw float32 array (as embeddings would arrive) and on a float64
/// copy, three times each; prints one JSON object.
const SCIKIT_LEARN_SCRIPT: &str = r#"
import json, sys, time
import numpy as np
import sklearn
from sklearn.linear_model import LogisticRegression

folder, n, dim, runs, compared = sys.argv[1], *map(int, sys.argv[2:6])
x32 = np.fromfile(f"{folder}/vectors.f32", dtype="<f4").reshape(n, dim)
y = np.fromfile(f"{folder}/labels.u32", dtype="<u4").astype(np.int64)
results = {"version": sklearn.__version__}
for name, x in [("float32", x32), ("float64", x32.astype(np.float64))]:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        model = LogisticRegression(C=1.0, tol=1e-4, max_iter=1000).fit(x, y)
        times.append(time.perf_counter() - start)
    x64 = x32.astype(np.float64)
    p = model.predict_proba(x64)
    mean_loss = -np.log(p[np.arange(n), y]).mean()
    objective = mean_loss + (model.coef_.astype(np.float64) ** 2).sum() / (2 * 1.0 * n)
    results[name] = {
        "times": times,
        "n_iter": int(model.n_iter_[0]),
        "objective": float(objective),
        "probabilities": p[:compared].ravel().tolist(),
    }
print(json.dumps(results))
"#;

fn normalise(vector: &mut [f32]) {
    let norm = vector.iter().map(|x| x * x).sum::<f32>().sqrt();
    vector.iter_mut().for_each(|x| *x /= norm);
}

/// `n` unit vectors around `N_CLASSES` random directions with overlapping noise; 5% of the
/// labels point at another class.
fn synthetic(n: usize, rng: &mut ChaCha8Rng) -> (Vec<f32>, Vec<usize>) {
    let centres: Vec<Vec<f32>> = (0..N_CLASSES)
        .map(|_| {
            let mut centre: Vec<f32> = (0..DIM).map(|_| rng.random::<f32>() - 0.5).collect();
            normalise(&mut centre);
            centre
        })
        .collect();
    let mut vectors = Vec::with_capacity(n * DIM);
    let mut labels = Vec::with_capacity(n);
    for _ in 0..n {
        let class = rng.random_range(0..N_CLASSES);
        let mut vector: Vec<f32> = centres[class]
            .iter()
            .map(|c| c + NOISE * (rng.random::<f32>() - 0.5))
            .collect();
        normalise(&mut vector);
        vectors.extend_from_slice(&vector);
        let flipped = rng.random::<f32>() < 0.05;
        labels.push(if flipped {
            (class + rng.random_range(1..N_CLASSES)) % N_CLASSES
        } else {
            class
        });
    }
    (vectors, labels)
}

fn median(mut values: Vec<f64>) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

struct Row {
    name: String,
    seconds: f64,
    iterations: usize,
    objective: f64,
    probability_gap: Option<f64>,
}

#[derive(serde::Deserialize)]
struct ScikitLearnRun {
    times: Vec<f64>,
    n_iter: usize,
    objective: f64,
    probabilities: Vec<f64>,
}

#[derive(serde::Deserialize)]
struct ScikitLearnResults {
    version: String,
    float32: ScikitLearnRun,
    float64: ScikitLearnRun,
}

fn scikit_learn(
    python: &str,
    vectors: &[f32],
    labels: &[usize],
    ours: &LogisticFit,
) -> Result<Vec<Row>> {
    let n = labels.len();
    let folder = tempfile::tempdir()?;
    let mut file = std::fs::File::create(folder.path().join("vectors.f32"))?;
    for value in vectors {
        file.write_all(&value.to_le_bytes())?;
    }
    let mut file = std::fs::File::create(folder.path().join("labels.u32"))?;
    for &label in labels {
        file.write_all(&u32::try_from(label)?.to_le_bytes())?;
    }
    let compared = COMPARED_ROWS.min(n);
    let output = Command::new(python)
        .args(["-c", SCIKIT_LEARN_SCRIPT])
        .arg(folder.path())
        .args([n, DIM, RUNS, compared].map(|value| value.to_string()))
        .output()
        .with_context(|| format!("running {python}"))?;
    if !output.status.success() {
        bail!(
            "scikit-learn run failed: {}",
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let results: ScikitLearnResults = serde_json::from_slice(&output.stdout)?;
    let our_probabilities = ours.model.probabilities(&vectors[..compared * DIM])?;
    Ok([("float32", results.float32), ("float64", results.float64)]
        .into_iter()
        .map(|(precision, run)| {
            let gap = our_probabilities
                .iter()
                .zip(&run.probabilities)
                .map(|(&ours, theirs)| (f64::from(ours) - theirs).abs())
                .fold(0.0, f64::max);
            Row {
                name: format!("scikit-learn {} lbfgs, {precision} input", results.version),
                seconds: median(run.times),
                iterations: run.n_iter,
                objective: run.objective,
                probability_gap: Some(gap),
            }
        })
        .collect())
}

fn main() -> Result<()> {
    let n: usize = match std::env::args().nth(1) {
        Some(argument) => argument.parse().context("N must be a number of rows")?,
        None => 100_000,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let (vectors, labels) = synthetic(n, &mut rng);
    let options = LogisticRegressionOptions::default();

    let mut times = Vec::new();
    let mut fit = None;
    for _ in 0..RUNS {
        let start = Instant::now();
        let result = fit_logistic_regression(&vectors, DIM, &labels, N_CLASSES, &options)?;
        times.push(start.elapsed().as_secs_f64());
        fit = Some(result);
    }
    let fit = fit.context("no run")?;
    let mut rows = vec![Row {
        name: "vitrine (f32 input, f64 arithmetic)".into(),
        seconds: median(times),
        iterations: fit.iterations,
        objective: fit.objective,
        probability_gap: None,
    }];
    match std::env::var("VITRINE_PYTHON") {
        Ok(python) => rows.extend(scikit_learn(&python, &vectors, &labels, &fit)?),
        Err(_) => eprintln!("VITRINE_PYTHON is not set: scikit-learn not run"),
    }

    let probabilities = fit.model.probabilities(&vectors)?;
    let predicted = top_class_outcomes(&probabilities, N_CLASSES, &labels)?;
    let accuracy = predicted.iter().filter(|outcome| outcome.correct).count() as f64 / n as f64;
    println!(
        "Multinomial logistic regression, {n} x {DIM} unit vectors, {N_CLASSES} classes (5% of \
         labels flipped; training accuracy {accuracy:.3}), C = 1, tol = 1e-4; {} threads; \
         median of {RUNS} runs; ours stopped on {:?}.",
        rayon::current_num_threads(),
        fit.termination
    );
    println!();
    println!("| implementation | seconds | iterations | final objective | max probability gap from ours | time / ours |");
    println!("|---|---:|---:|---:|---:|---:|");
    let ours = rows[0].seconds;
    for row in &rows {
        println!(
            "| {} | {:.2} | {} | {:.9} | {} | {:.2} |",
            row.name,
            row.seconds,
            row.iterations,
            row.objective,
            row.probability_gap
                .map_or("-".to_string(), |gap| format!("{gap:.1e}")),
            row.seconds / ours
        );
    }
    Ok(())
}
