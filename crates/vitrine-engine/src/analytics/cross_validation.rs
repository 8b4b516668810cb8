//! Stratified k-fold assignment and out-of-fold predictions.
//!
//! An out-of-fold prediction for a labelled item comes from a model that never saw it: the
//! items are split into folds, and each fold is scored by a model fitted on all the others.
//! These are the honest scores calibration and label checks need (a model scores its own
//! training items too confidently).

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::logistic::{
    check_labels, check_options, class_counts, fit_rows, LogisticModel, LogisticRegressionOptions,
    Termination,
};
use super::{count_rows, AnalyticsError};

/// Assigns each item to one of `n_folds` folds, stratified by class; returns each item's fold.
///
/// The rule: classes are visited in increasing index; each class's items, taken in increasing
/// row order, are shuffled by one ChaCha8 stream seeded with `seed` (shared by all classes, in
/// that order), then dealt to the folds in turn, the dealing continuing from one class to the
/// next where the previous one stopped. Hence within every class the fold counts differ by at
/// most one (a class with at least two items is never confined to one fold, so every fold's
/// complement contains it), and the fold sizes also differ by at most one.
pub fn stratified_folds(
    labels: &[usize],
    n_classes: usize,
    n_folds: usize,
    seed: u64,
) -> Result<Vec<usize>, AnalyticsError> {
    check_labels(labels, labels.len(), n_classes)?;
    if n_folds < 2 {
        return Err(AnalyticsError::InvalidParameter {
            name: "n_folds",
            value: n_folds.to_string(),
            reason: "must be at least 2",
        });
    }
    let mut members_by_class = vec![Vec::new(); n_classes];
    for (row, &label) in labels.iter().enumerate() {
        members_by_class[label].push(row);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut folds = vec![0; labels.len()];
    let mut dealt = 0;
    for members in &mut members_by_class {
        members.shuffle(&mut rng);
        for &row in members.iter() {
            folds[row] = dealt % n_folds;
            dealt += 1;
        }
    }
    Ok(folds)
}

/// How the model for one fold was fitted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FoldFit {
    pub fold: usize,
    /// Items the fold's model was fitted on (all items outside the fold).
    pub n_training: usize,
    pub iterations: usize,
    pub termination: Termination,
    pub max_abs_gradient: f64,
}

/// Outcome of [`out_of_fold_logits`].
#[derive(Debug, Clone, PartialEq)]
pub struct OutOfFoldLogits {
    /// `n x n_classes`, row-major: row `i` holds the logits of the model fitted without
    /// item `i`'s fold.
    pub logits: Vec<f32>,
    /// One entry per fold that holds items, in fold order.
    pub fits: Vec<FoldFit>,
    /// The fold models, in the order of `fits`: averaged, they judge new
    /// items as confidently as the out-of-fold logits judged the known ones.
    pub models: Vec<LogisticModel>,
}

/// Logistic-regression logits of every item from the model fitted on the other folds.
///
/// `folds[i] < n_folds` is item `i`'s fold (from [`stratified_folds`] or any other split).
/// Every class must have an item outside each fold that holds items; with
/// [`stratified_folds`] that holds when every class has at least two items. Folds are fitted
/// one after the other, each fit using every core.
pub fn out_of_fold_logits(
    vectors: &[f32],
    dim: usize,
    labels: &[usize],
    n_classes: usize,
    folds: &[usize],
    n_folds: usize,
    options: &LogisticRegressionOptions,
) -> Result<OutOfFoldLogits, AnalyticsError> {
    let n_rows = count_rows("vectors", vectors, dim)?;
    check_labels(labels, n_rows, n_classes)?;
    check_options(options)?;
    if folds.len() != n_rows {
        return Err(AnalyticsError::LengthMismatch {
            what: "folds",
            found: folds.len(),
            expected: n_rows,
        });
    }
    if let Some(row) = folds.iter().position(|&fold| fold >= n_folds) {
        return Err(AnalyticsError::ValueOutOfRange {
            what: "folds",
            row,
            value: folds[row],
            limit: n_folds,
        });
    }
    let mut held_out_by_fold = vec![Vec::new(); n_folds];
    for (row, &fold) in folds.iter().enumerate() {
        held_out_by_fold[fold].push(row);
    }
    let total_counts = class_counts(labels.iter().copied(), n_classes);
    for (fold, held_out) in held_out_by_fold.iter().enumerate() {
        if held_out.is_empty() {
            continue;
        }
        let held_out_counts = class_counts(held_out.iter().map(|&row| labels[row]), n_classes);
        if let Some(class) =
            (0..n_classes).find(|&class| total_counts[class] == held_out_counts[class])
        {
            return Err(AnalyticsError::ClassMissingFromTraining { class, fold });
        }
    }

    let mut logits = vec![0f32; n_rows * n_classes];
    let mut fits = Vec::new();
    let mut models = Vec::new();
    for (fold, held_out) in held_out_by_fold.iter().enumerate() {
        if held_out.is_empty() {
            continue;
        }
        let training: Vec<usize> = (0..n_rows).filter(|&row| folds[row] != fold).collect();
        let fit = fit_rows(vectors, dim, labels, &training, n_classes, options);
        let fold_logits = fit.model.logits_of_rows(vectors, held_out);
        for (&row, row_logits) in held_out.iter().zip(fold_logits.chunks_exact(n_classes)) {
            logits[row * n_classes..(row + 1) * n_classes].copy_from_slice(row_logits);
        }
        fits.push(FoldFit {
            fold,
            n_training: training.len(),
            iterations: fit.iterations,
            termination: fit.termination,
            max_abs_gradient: fit.max_abs_gradient,
        });
        models.push(fit.model);
    }
    Ok(OutOfFoldLogits {
        logits,
        fits,
        models,
    })
}
