//! Regularised multinomial logistic regression (softmax regression) on embedding vectors.
//!
//! Class `k` scores a vector `x` as `z_k = w_k · x + b_k`; the class probabilities are
//! `softmax(z)`. Fitting minimises the objective of scikit-learn's
//! `LogisticRegression(C=c, fit_intercept=True)` with its L2 penalty and multinomial loss:
//!
//! ```text
//! c * Σ_i [ log Σ_k exp(z_ik) - z_i,label(i) ]  +  ½ ‖W‖²
//! ```
//!
//! The penalty covers the weights only, never the intercepts. The objective is strictly convex
//! in the weights, so any solver that reaches its optimum returns the same model; we minimise it
//! divided by `c · n` (mean cross-entropy + `‖W‖² / (2 c n)`, the form scikit-learn hands to
//! scipy's L-BFGS, and the one `tolerance` is measured on) with our own L-BFGS.
//!
//! Two classes: scikit-learn then fits its binary model, one vector `w` penalised by `½‖w‖²`.
//! The softmax with rows `-w/2` and `w/2` gives the same probabilities, but its penalty
//! `½(‖w/2‖² + ‖w/2‖²)` is half as large, so for two classes the penalty is doubled (the fit
//! uses `c / 2`). Then weights row 1 minus row 0 is scikit-learn's `coef_`, and intercept 1
//! minus intercept 0 its `intercept_`.
//!
//! Intercepts are defined only up to a common shift (the loss ignores it and it carries no
//! penalty). Starting from zero, every gradient's intercept part sums to zero, so L-BFGS keeps
//! the intercepts' sum at zero (up to rounding), which is also the representative
//! scikit-learn's lbfgs returns.
//!
//! Arithmetic: embeddings stay `f32` in memory; each block of rows is widened to `f64` and
//! scored by one single-threaded `f64` matrix product, and the softmax, loss and gradient are
//! `f64`. Fixed tasks of rows run in parallel and their sums are added in task order, so the
//! result does not depend on the thread count.

use rayon::prelude::*;

pub use super::lbfgs::Termination;
use super::lbfgs::{minimise, LbfgsSettings};
use super::matmul::{multiply, Operand};
use super::{count_rows, AnalyticsError};

/// Rows per parallel task; partial gradients are summed per task, in task order.
const ROWS_PER_TASK: usize = 2048;
/// Rows per matrix product: the widened block (`ROWS_PER_BLOCK x dim` f64, 768 KiB at
/// dim = 384) stays in cache between the forward and the gradient product.
const ROWS_PER_BLOCK: usize = 256;

/// Settings for [`fit_logistic_regression`]; `Default` gives scikit-learn's `C = 1` and
/// `tol = 1e-4`, with more iterations than its `max_iter = 100`.
#[derive(Debug, Clone, PartialEq)]
pub struct LogisticRegressionOptions {
    /// Inverse regularisation strength (scikit-learn's `C`): larger trusts the data more.
    pub c: f64,
    /// Stop once every component of the gradient of the scaled objective (see the module
    /// documentation) is at most this (scikit-learn's `tol`).
    pub tolerance: f64,
    /// Upper bound on L-BFGS iterations.
    pub max_iterations: usize,
}

impl Default for LogisticRegressionOptions {
    fn default() -> Self {
        Self {
            c: 1.0,
            tolerance: 1e-4,
            max_iterations: 1000,
        }
    }
}

/// A fitted model: per-class weight vectors and intercepts.
#[derive(Debug, Clone, PartialEq)]
pub struct LogisticModel {
    dim: usize,
    n_classes: usize,
    weights: Vec<f64>,
    intercepts: Vec<f64>,
}

impl LogisticModel {
    pub fn dim(&self) -> usize {
        self.dim
    }

    pub fn n_classes(&self) -> usize {
        self.n_classes
    }

    /// `n_classes x dim`, row-major: row `k` is class `k`'s weight vector.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// One per class, summing to zero.
    pub fn intercepts(&self) -> &[f64] {
        &self.intercepts
    }

    /// Class scores `z` of every row of `vectors` (`n x n_classes`, row-major).
    pub fn logits(&self, vectors: &[f32]) -> Result<Vec<f32>, AnalyticsError> {
        let n_rows = count_rows("vectors", vectors, self.dim)?;
        let rows: Vec<usize> = (0..n_rows).collect();
        Ok(self.logits_of_rows(vectors, &rows))
    }

    /// Class probabilities of every row of `vectors` (`n x n_classes`, row-major).
    pub fn probabilities(&self, vectors: &[f32]) -> Result<Vec<f32>, AnalyticsError> {
        softmax_rows(&self.logits(vectors)?, self.n_classes)
    }

    /// Logits of the listed rows of `vectors`, in list order; rows must be in range.
    pub(crate) fn logits_of_rows(&self, vectors: &[f32], rows: &[usize]) -> Vec<f32> {
        let per_task: Vec<Vec<f32>> = rows
            .par_chunks(ROWS_PER_TASK)
            .map(|task_rows| {
                let mut scorer = BlockScorer::new(self.dim, self.n_classes);
                let mut logits = Vec::with_capacity(task_rows.len() * self.n_classes);
                for block_rows in task_rows.chunks(ROWS_PER_BLOCK) {
                    let scores = scorer.score(vectors, block_rows, &self.weights, &self.intercepts);
                    logits.extend(scores.iter().map(|&score| score as f32));
                }
                logits
            })
            .collect();
        per_task.concat()
    }
}

/// Outcome of [`fit_logistic_regression`].
#[derive(Debug, Clone, PartialEq)]
pub struct LogisticFit {
    pub model: LogisticModel,
    /// L-BFGS iterations run (scikit-learn's `n_iter_`).
    pub iterations: usize,
    pub termination: Termination,
    /// Largest gradient component of the scaled objective at the returned model.
    pub max_abs_gradient: f64,
    /// The scaled objective at the returned model: mean cross-entropy + `‖W‖² / (2 c n)`.
    pub objective: f64,
}

/// Fits the model to the `dim`-dimensional rows of `vectors` with class indices `labels`
/// (`labels[i] < n_classes`); every class needs at least one row.
pub fn fit_logistic_regression(
    vectors: &[f32],
    dim: usize,
    labels: &[usize],
    n_classes: usize,
    options: &LogisticRegressionOptions,
) -> Result<LogisticFit, AnalyticsError> {
    let n_rows = count_rows("vectors", vectors, dim)?;
    check_labels(labels, n_rows, n_classes)?;
    check_options(options)?;
    let counts = class_counts(labels.iter().copied(), n_classes);
    if let Some(class) = counts.iter().position(|&count| count == 0) {
        return Err(AnalyticsError::ClassWithoutItems { class });
    }
    let rows: Vec<usize> = (0..n_rows).collect();
    Ok(fit_rows(vectors, dim, labels, &rows, n_classes, options))
}

/// Checks the class-index labels of `n_rows` rows: one per row, each below `n_classes`, and at
/// least two classes.
pub(crate) fn check_labels(
    labels: &[usize],
    n_rows: usize,
    n_classes: usize,
) -> Result<(), AnalyticsError> {
    if n_classes < 2 {
        return Err(AnalyticsError::InvalidParameter {
            name: "n_classes",
            value: n_classes.to_string(),
            reason: "a classifier needs at least 2 classes",
        });
    }
    if labels.len() != n_rows {
        return Err(AnalyticsError::LengthMismatch {
            what: "labels",
            found: labels.len(),
            expected: n_rows,
        });
    }
    match labels.iter().position(|&label| label >= n_classes) {
        Some(row) => Err(AnalyticsError::ValueOutOfRange {
            what: "labels",
            row,
            value: labels[row],
            limit: n_classes,
        }),
        None => Ok(()),
    }
}

pub(crate) fn check_options(options: &LogisticRegressionOptions) -> Result<(), AnalyticsError> {
    if !(options.c.is_finite() && options.c > 0.0) {
        return Err(AnalyticsError::InvalidParameter {
            name: "c",
            value: options.c.to_string(),
            reason: "must be a positive finite number",
        });
    }
    if options.tolerance.is_nan() || options.tolerance < 0.0 {
        return Err(AnalyticsError::InvalidParameter {
            name: "tolerance",
            value: options.tolerance.to_string(),
            reason: "must be a non-negative number",
        });
    }
    if options.max_iterations == 0 {
        return Err(AnalyticsError::InvalidParameter {
            name: "max_iterations",
            value: "0".into(),
            reason: "must be at least 1",
        });
    }
    Ok(())
}

/// How many of `labels` name each class (all below `n_classes`).
pub(crate) fn class_counts(
    labels: impl IntoIterator<Item = usize>,
    n_classes: usize,
) -> Vec<usize> {
    let mut counts = vec![0; n_classes];
    for label in labels {
        counts[label] += 1;
    }
    counts
}

/// Fits on the listed rows only; inputs already checked, every class present among `rows`.
pub(crate) fn fit_rows(
    vectors: &[f32],
    dim: usize,
    labels: &[usize],
    rows: &[usize],
    n_classes: usize,
    options: &LogisticRegressionOptions,
) -> LogisticFit {
    let penalised_c = if n_classes == 2 {
        options.c / 2.0
    } else {
        options.c
    };
    let training = TrainingSet {
        vectors,
        dim,
        labels,
        rows,
        n_classes,
        penalty: 1.0 / (penalised_c * rows.len() as f64),
    };
    let minimum = minimise(
        |parameters, gradient| training.objective(parameters, gradient),
        vec![0.0; n_classes * (dim + 1)],
        LbfgsSettings {
            gradient_tolerance: options.tolerance,
            max_iterations: options.max_iterations,
        },
    );
    let mut weights = minimum.point;
    let intercepts = weights.split_off(n_classes * dim);
    LogisticFit {
        model: LogisticModel {
            dim,
            n_classes,
            weights,
            intercepts,
        },
        iterations: minimum.iterations,
        termination: minimum.termination,
        max_abs_gradient: minimum.max_abs_gradient,
        objective: minimum.value,
    }
}

/// Row-wise softmax of `logits` (`n x n_classes`, row-major).
pub fn softmax_rows(logits: &[f32], n_classes: usize) -> Result<Vec<f32>, AnalyticsError> {
    count_rows("logits", logits, n_classes)?;
    Ok(logits
        .par_chunks(n_classes)
        .flat_map_iter(|row| {
            let wide: Vec<f64> = row.iter().map(|&z| f64::from(z)).collect();
            let normaliser = log_sum_exp(&wide);
            wide.into_iter().map(move |z| (z - normaliser).exp() as f32)
        })
        .collect())
}

/// `log Σ exp(z)`, shifted by the maximum so that no term overflows.
fn log_sum_exp(row: &[f64]) -> f64 {
    let largest = row.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    largest + row.iter().map(|z| (z - largest).exp()).sum::<f64>().ln()
}

/// The rows a model is fitted on, and the penalty of the scaled objective, `1 / (c n)`.
struct TrainingSet<'a> {
    vectors: &'a [f32],
    dim: usize,
    labels: &'a [usize],
    rows: &'a [usize],
    n_classes: usize,
    penalty: f64,
}

/// One task's unscaled sums: cross-entropy, and the loss gradient for weights and intercepts.
struct TaskSums {
    loss: f64,
    weights_gradient: Vec<f64>,
    intercepts_gradient: Vec<f64>,
}

impl TrainingSet<'_> {
    /// The scaled objective at `parameters` (weights row-major, then intercepts); writes its
    /// gradient.
    fn objective(&self, parameters: &[f64], gradient: &mut [f64]) -> f64 {
        let (weights, intercepts) = parameters.split_at(self.n_classes * self.dim);
        let tasks: Vec<TaskSums> = self
            .rows
            .par_chunks(ROWS_PER_TASK)
            .map(|task_rows| self.task_sums(task_rows, weights, intercepts))
            .collect();
        let scale = 1.0 / self.rows.len() as f64;
        let (weights_gradient, intercepts_gradient) =
            gradient.split_at_mut(self.n_classes * self.dim);
        weights_gradient.fill(0.0);
        intercepts_gradient.fill(0.0);
        let mut loss = 0.0;
        for task in &tasks {
            loss += task.loss;
            add_assign(weights_gradient, &task.weights_gradient);
            add_assign(intercepts_gradient, &task.intercepts_gradient);
        }
        for (slot, weight) in weights_gradient.iter_mut().zip(weights) {
            *slot = *slot * scale + self.penalty * weight;
        }
        intercepts_gradient
            .iter_mut()
            .for_each(|slot| *slot *= scale);
        let squared_norm: f64 = weights.iter().map(|w| w * w).sum();
        loss * scale + 0.5 * self.penalty * squared_norm
    }

    fn task_sums(&self, task_rows: &[usize], weights: &[f64], intercepts: &[f64]) -> TaskSums {
        let (dim, n_classes) = (self.dim, self.n_classes);
        let mut scorer = BlockScorer::new(dim, n_classes);
        let mut sums = TaskSums {
            loss: 0.0,
            weights_gradient: vec![0.0; n_classes * dim],
            intercepts_gradient: vec![0.0; n_classes],
        };
        for block_rows in task_rows.chunks(ROWS_PER_BLOCK) {
            scorer.score(self.vectors, block_rows, weights, intercepts);
            let n_rows = block_rows.len();
            // Each row's logits become its loss gradient with respect to the logits,
            // softmax(z) - onehot(label).
            let residuals = &mut scorer.logits[..n_rows * n_classes];
            for (row_residuals, &row) in residuals.chunks_exact_mut(n_classes).zip(block_rows) {
                let label = self.labels[row];
                let normaliser = log_sum_exp(row_residuals);
                sums.loss += normaliser - row_residuals[label];
                row_residuals
                    .iter_mut()
                    .for_each(|z| *z = (*z - normaliser).exp());
                row_residuals[label] -= 1.0;
                add_assign(&mut sums.intercepts_gradient, row_residuals);
            }
            multiply(
                &mut sums.weights_gradient,
                &Operand {
                    data: residuals,
                    rows: n_rows,
                    cols: n_classes,
                    transposed: true,
                },
                &Operand {
                    data: &scorer.widened[..n_rows * dim],
                    rows: n_rows,
                    cols: dim,
                    transposed: false,
                },
                true,
            );
        }
        sums
    }
}

/// Buffers for scoring one block of rows at a time, reused across the blocks of a task.
struct BlockScorer {
    dim: usize,
    n_classes: usize,
    /// The block's rows widened to f64, `ROWS_PER_BLOCK x dim` row-major.
    widened: Vec<f64>,
    /// The block's logits, `ROWS_PER_BLOCK x n_classes` row-major.
    logits: Vec<f64>,
}

impl BlockScorer {
    fn new(dim: usize, n_classes: usize) -> Self {
        Self {
            dim,
            n_classes,
            widened: vec![0.0; ROWS_PER_BLOCK * dim],
            logits: vec![0.0; ROWS_PER_BLOCK * n_classes],
        }
    }

    /// Widens the listed rows of `vectors` (at most `ROWS_PER_BLOCK`) and returns their logits,
    /// `rows.len() x n_classes` row-major.
    fn score(
        &mut self,
        vectors: &[f32],
        rows: &[usize],
        weights: &[f64],
        intercepts: &[f64],
    ) -> &[f64] {
        let (dim, n_classes, n_rows) = (self.dim, self.n_classes, rows.len());
        for (target, &row) in self.widened.chunks_exact_mut(dim).zip(rows) {
            for (wide, &value) in target.iter_mut().zip(&vectors[row * dim..(row + 1) * dim]) {
                *wide = f64::from(value);
            }
        }
        let logits = &mut self.logits[..n_rows * n_classes];
        for row_logits in logits.chunks_exact_mut(n_classes) {
            row_logits.copy_from_slice(intercepts);
        }
        // The intercepts are in place: the product adds to them.
        multiply(
            logits,
            &Operand {
                data: &self.widened[..n_rows * dim],
                rows: n_rows,
                cols: dim,
                transposed: false,
            },
            &Operand {
                data: weights,
                rows: n_classes,
                cols: dim,
                transposed: true,
            },
            true,
        );
        logits
    }
}

fn add_assign(target: &mut [f64], source: &[f64]) {
    target.iter_mut().zip(source).for_each(|(t, s)| *t += s);
}
