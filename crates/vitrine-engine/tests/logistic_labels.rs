//! Logistic regression, out-of-fold predictions and calibration, checked against scikit-learn
//! and against held-out labels.
//!
//! Reference values come from `fixtures/make_logistic_fixtures.py`, run with scikit-learn
//! 1.9.1 and numpy 2.4.6 (versions recorded in the fixture's metadata and asserted below).
//! The fixture's `held_out` part is never used to fit or choose anything: the tests only
//! score on it, and report those figures separately.

use anyhow::{ensure, Result};
use serde::Deserialize;
use vitrine_engine::analytics::{
    expected_calibration_error, fit_logistic_regression, out_of_fold_logits, reliability_table,
    softmax_rows, stratified_folds, top_class_outcomes, AccuracyCurve, AnalyticsError,
    ConfidenceOutcome, IsotonicCalibration, LogisticFit, LogisticRegressionOptions,
};

const SCIKIT_LEARN_VERSION: &str = "1.9.1";

/// Largest coefficient or intercept difference from scikit-learn's lbfgs solution. Its own
/// distance from the exact optimum is recorded in the fixture (`lbfgs_vs_newton_cholesky_max_
/// coef_gap`, up to 5.2e-6 here), so agreement cannot be demanded much tighter than that plus
/// our own distance (below).
const COEFFICIENT_TOLERANCE: f64 = 2e-5;
/// Largest coefficient or intercept difference from scikit-learn's Newton-Cholesky solution,
/// the optimum to rounding (its gradient is about 1e-15). We stop at gradient 1e-10; how far
/// that leaves us depends on the weakest curvature (`1 / (c n)`, 1 / 12,000 at C = 50), about
/// 4e-8 when this was written, so this leaves fifty-fold room for other CPUs' rounding.
const EXACT_OPTIMUM_TOLERANCE: f64 = 2e-6;
/// Largest class-probability difference from scikit-learn's `predict_proba`.
const PROBABILITY_TOLERANCE: f64 = 1e-5;

#[derive(Deserialize)]
struct Metadata {
    scikit_learn_version: String,
}

/// One scikit-learn fit: lbfgs (the reference estimator) and Newton-Cholesky (the exact
/// optimum).
#[derive(Deserialize)]
struct Reference {
    c: f64,
    sklearn_coef: Vec<Vec<f64>>,
    sklearn_intercept: Vec<f64>,
    sklearn_newton_cholesky_coef: Vec<Vec<f64>>,
    sklearn_newton_cholesky_intercept: Vec<f64>,
}

/// scikit-learn's isotonic regression of out-of-fold correctness on confidence.
#[derive(Deserialize)]
struct IsotonicCase {
    confidences: Vec<f32>,
    correct: Vec<bool>,
    queries: Vec<f32>,
    sklearn_predictions: Vec<f64>,
}

#[derive(Deserialize)]
struct MulticlassCase {
    dim: usize,
    n_classes: usize,
    train: Vec<Vec<f32>>,
    train_labels: Vec<usize>,
    n_folds: usize,
    folds: Vec<usize>,
    held_out: Vec<Vec<f32>>,
    held_out_labels: Vec<usize>,
    #[serde(flatten)]
    reference: Reference,
    sklearn_held_out_probabilities: Vec<Vec<f64>>,
    sklearn_out_of_fold_probabilities: Vec<Vec<f64>>,
    weak_penalty: Reference,
    isotonic: IsotonicCase,
}

#[derive(Deserialize)]
struct BinaryCase {
    dim: usize,
    train: Vec<Vec<f32>>,
    train_labels: Vec<usize>,
    #[serde(flatten)]
    reference: Reference,
    sklearn_train_probabilities: Vec<Vec<f64>>,
}

#[derive(Deserialize)]
struct Fixture {
    metadata: Metadata,
    multiclass: MulticlassCase,
    binary: BinaryCase,
}

fn fixture() -> Result<Fixture> {
    let fixture: Fixture = serde_json::from_str(include_str!("fixtures/logistic_reference.json"))?;
    ensure!(fixture.metadata.scikit_learn_version == SCIKIT_LEARN_VERSION);
    Ok(fixture)
}

fn flatten<T: Copy>(rows: &[Vec<T>]) -> Vec<T> {
    rows.iter().flatten().copied().collect()
}

/// The options the scikit-learn references were fitted with (`tol=1e-10`, effectively
/// unlimited iterations).
fn tight(c: f64) -> LogisticRegressionOptions {
    LogisticRegressionOptions {
        c,
        tolerance: 1e-10,
        max_iterations: 100_000,
    }
}

fn max_abs_gap(ours: impl IntoIterator<Item = f64>, theirs: &[f64]) -> f64 {
    let ours: Vec<f64> = ours.into_iter().collect();
    assert_eq!(ours.len(), theirs.len());
    ours.iter()
        .zip(theirs)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max)
}

/// Largest gaps of a multiclass fit from a reference: (lbfgs, Newton-Cholesky).
fn coefficient_gaps(fit: &LogisticFit, reference: &Reference) -> (f64, f64) {
    let model = &fit.model;
    let ours = || model.weights().iter().chain(model.intercepts()).copied();
    let lbfgs = [
        flatten(&reference.sklearn_coef),
        reference.sklearn_intercept.clone(),
    ]
    .concat();
    let exact = [
        flatten(&reference.sklearn_newton_cholesky_coef),
        reference.sklearn_newton_cholesky_intercept.clone(),
    ]
    .concat();
    (max_abs_gap(ours(), &lbfgs), max_abs_gap(ours(), &exact))
}

#[test]
fn multiclass_fit_matches_scikit_learn() -> Result<()> {
    let case = fixture()?.multiclass;
    for reference in [&case.reference, &case.weak_penalty] {
        let fit = fit_logistic_regression(
            &flatten(&case.train),
            case.dim,
            &case.train_labels,
            case.n_classes,
            &tight(reference.c),
        )?;
        assert!(fit.termination.converged(), "{:?}", fit.termination);
        // scikit-learn 1.9.1 LogisticRegression(C, tol=1e-10): coef_ and intercept_ (all four
        // classes, multinomial), from lbfgs and from newton-cholesky.
        let (lbfgs_gap, exact_gap) = coefficient_gaps(&fit, reference);
        eprintln!(
            "C = {}: {} iterations ({:?}, max |gradient| {:.1e}); max coefficient gap {lbfgs_gap:.1e} \
             from lbfgs, {exact_gap:.1e} from newton-cholesky",
            reference.c, fit.iterations, fit.termination, fit.max_abs_gradient
        );
        assert!(
            lbfgs_gap <= COEFFICIENT_TOLERANCE,
            "C = {}: {lbfgs_gap}",
            reference.c
        );
        assert!(
            exact_gap <= EXACT_OPTIMUM_TOLERANCE,
            "C = {}: {exact_gap}",
            reference.c
        );
    }

    // scikit-learn 1.9.1 predict_proba on the held-out vectors (C = 1).
    let fit = fit_logistic_regression(
        &flatten(&case.train),
        case.dim,
        &case.train_labels,
        case.n_classes,
        &tight(case.reference.c),
    )?;
    let probabilities = fit.model.probabilities(&flatten(&case.held_out))?;
    let gap = max_abs_gap(
        probabilities.iter().map(|&p| f64::from(p)),
        &flatten(&case.sklearn_held_out_probabilities),
    );
    eprintln!("held-out probabilities: max gap {gap:.1e} from scikit-learn");
    assert!(gap <= PROBABILITY_TOLERANCE, "{gap}");
    Ok(())
}

#[test]
fn two_classes_match_scikit_learns_binary_model() -> Result<()> {
    let case = fixture()?.binary;
    let fit = fit_logistic_regression(
        &flatten(&case.train),
        case.dim,
        &case.train_labels,
        2,
        &tight(case.reference.c),
    )?;
    assert!(fit.termination.converged(), "{:?}", fit.termination);
    // scikit-learn 1.9.1 fits one weight vector for two classes: coef_[0] is our class-1
    // weights minus our class-0 weights, intercept_[0] likewise.
    let weights = fit.model.weights();
    let (class_0, class_1) = weights.split_at(case.dim);
    let intercepts = fit.model.intercepts();
    let difference = class_1
        .iter()
        .zip(class_0)
        .map(|(one, zero)| one - zero)
        .chain([intercepts[1] - intercepts[0]]);
    let lbfgs = [
        flatten(&case.reference.sklearn_coef),
        case.reference.sklearn_intercept,
    ]
    .concat();
    let exact = [
        flatten(&case.reference.sklearn_newton_cholesky_coef),
        case.reference.sklearn_newton_cholesky_intercept,
    ]
    .concat();
    let difference: Vec<f64> = difference.collect();
    let lbfgs_gap = max_abs_gap(difference.iter().copied(), &lbfgs);
    let exact_gap = max_abs_gap(difference.iter().copied(), &exact);
    let probabilities = fit.model.probabilities(&flatten(&case.train))?;
    let probability_gap = max_abs_gap(
        probabilities.iter().map(|&p| f64::from(p)),
        &flatten(&case.sklearn_train_probabilities),
    );
    eprintln!(
        "binary, C = {}: coefficient gap {lbfgs_gap:.1e} from lbfgs, {exact_gap:.1e} from \
         newton-cholesky; probability gap {probability_gap:.1e}",
        case.reference.c
    );
    assert!(lbfgs_gap <= COEFFICIENT_TOLERANCE, "{lbfgs_gap}");
    assert!(exact_gap <= EXACT_OPTIMUM_TOLERANCE, "{exact_gap}");
    assert!(
        probability_gap <= PROBABILITY_TOLERANCE,
        "{probability_gap}"
    );
    Ok(())
}

#[test]
fn out_of_fold_probabilities_match_scikit_learn_on_the_same_folds() -> Result<()> {
    let case = fixture()?.multiclass;
    // The folds are scikit-learn's StratifiedKFold(5, shuffle=True) split, read from the
    // fixture; scikit-learn 1.9.1 fitted LogisticRegression(C=1, tol=1e-10) on each fold's
    // complement and recorded predict_proba on the fold.
    let out_of_fold = out_of_fold_logits(
        &flatten(&case.train),
        case.dim,
        &case.train_labels,
        case.n_classes,
        &case.folds,
        case.n_folds,
        &tight(case.reference.c),
    )?;
    assert_eq!(out_of_fold.fits.len(), case.n_folds);
    for fit in &out_of_fold.fits {
        assert!(fit.termination.converged(), "{fit:?}");
        assert_eq!(
            fit.n_training,
            case.folds.iter().filter(|&&fold| fold != fit.fold).count()
        );
    }
    let probabilities = softmax_rows(&out_of_fold.logits, case.n_classes)?;
    let gap = max_abs_gap(
        probabilities.iter().map(|&p| f64::from(p)),
        &flatten(&case.sklearn_out_of_fold_probabilities),
    );
    eprintln!("out-of-fold probabilities: max gap {gap:.1e} from scikit-learn");
    assert!(gap <= PROBABILITY_TOLERANCE, "{gap}");
    Ok(())
}

#[test]
fn fitting_is_deterministic_across_thread_counts() -> Result<()> {
    let case = fixture()?.multiclass;
    // Enough rows (the fixture's vectors eight times over) for several parallel tasks.
    let all_rows = [flatten(&case.train), flatten(&case.held_out)].concat();
    let all_labels = [case.train_labels.clone(), case.held_out_labels.clone()].concat();
    let vectors = all_rows.repeat(8);
    let labels = all_labels.repeat(8);
    let options = LogisticRegressionOptions::default();
    let fit = || fit_logistic_regression(&vectors, case.dim, &labels, case.n_classes, &options);
    let default_pool = fit()?;
    let one_thread = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()?
        .install(fit)?;
    let three_threads = rayon::ThreadPoolBuilder::new()
        .num_threads(3)
        .build()?
        .install(fit)?;
    assert_eq!(default_pool, one_thread);
    assert_eq!(default_pool, three_threads);
    Ok(())
}

/// Checks the documented guarantees of `stratified_folds`: every class's fold counts, and the
/// fold sizes, differ by at most one.
fn assert_stratified(labels: &[usize], n_classes: usize, folds: &[usize], n_folds: usize) {
    let mut per_class = vec![vec![0usize; n_folds]; n_classes];
    for (&label, &fold) in labels.iter().zip(folds) {
        assert!(fold < n_folds);
        per_class[label][fold] += 1;
    }
    let spread = |counts: &[usize]| counts.iter().max().unwrap() - counts.iter().min().unwrap();
    for counts in &per_class {
        assert!(spread(counts) <= 1, "{counts:?}");
    }
    let sizes: Vec<usize> = (0..n_folds)
        .map(|fold| per_class.iter().map(|counts| counts[fold]).sum())
        .collect();
    assert!(spread(&sizes) <= 1, "{sizes:?}");
}

#[test]
fn stratified_folds_spread_every_class() -> Result<()> {
    let case = fixture()?.multiclass;
    // Uneven classes, some smaller than the number of folds, in scattered order.
    let class_sizes = [1usize, 2, 3, 7, 11, 40];
    let mut uneven: Vec<usize> = class_sizes
        .iter()
        .enumerate()
        .flat_map(|(class, &size)| std::iter::repeat_n(class, size))
        .collect();
    uneven.reverse();
    uneven.rotate_left(17);
    for (labels, n_classes) in [(&case.train_labels, case.n_classes), (&uneven, 6)] {
        for n_folds in [2, 5, 10] {
            let folds = stratified_folds(labels, n_classes, n_folds, 7)?;
            assert_stratified(labels, n_classes, &folds, n_folds);
            assert_eq!(folds, stratified_folds(labels, n_classes, n_folds, 7)?);
            assert_ne!(folds, stratified_folds(labels, n_classes, n_folds, 8)?);
        }
    }
    Ok(())
}

/// Three standard errors of a binomial proportion over `count` items, at accuracy `p` kept
/// away from 0 and 1 so that a near-perfect estimate still gets some room.
fn three_standard_errors(p: f64, count: usize) -> f64 {
    let p = p.clamp(0.05, 0.95);
    3.0 * (p * (1.0 - p) / count as f64).sqrt()
}

#[test]
fn calibrated_confidence_predicts_held_out_accuracy() -> Result<()> {
    let case = fixture()?.multiclass;
    let (train, held_out) = (flatten(&case.train), flatten(&case.held_out));
    let n_classes = case.n_classes;
    // Everything is fitted on the training part, with default settings, our own folds (seed 0)
    // and 10 bins, all fixed before any held-out figure was computed.
    let options = LogisticRegressionOptions::default();
    let folds = stratified_folds(&case.train_labels, n_classes, 5, 0)?;
    let out_of_fold = out_of_fold_logits(
        &train,
        case.dim,
        &case.train_labels,
        n_classes,
        &folds,
        5,
        &options,
    )?;
    let out_of_fold_outcomes = top_class_outcomes(
        &softmax_rows(&out_of_fold.logits, n_classes)?,
        n_classes,
        &case.train_labels,
    )?;
    let curve = AccuracyCurve::new(&out_of_fold_outcomes)?;
    let calibration = IsotonicCalibration::fit(&out_of_fold_outcomes)?;
    let model =
        fit_logistic_regression(&train, case.dim, &case.train_labels, n_classes, &options)?.model;

    // Outside truth: the held-out labels, drawn by the generator and never used above.
    let held_out_outcomes = top_class_outcomes(
        &model.probabilities(&held_out)?,
        n_classes,
        &case.held_out_labels,
    )?;
    let calibrated_outcomes = calibration.calibrate_outcomes(&held_out_outcomes);
    let held_out_curve = AccuracyCurve::new(&held_out_outcomes)?;
    for coverage in [0.25, 0.5, 0.75, 1.0] {
        let expected = curve.at_coverage(coverage)?;
        let observed = held_out_curve.at_cut(expected.cut)?;
        let (Some(expected_accuracy), Some(observed_accuracy)) =
            (expected.accuracy, observed.accuracy)
        else {
            panic!("no prediction at or above the cut {}", expected.cut);
        };
        // Margins fixed in advance: three standard errors (of the difference of the two
        // proportions, or of the held-out one), plus 0.02 because the out-of-fold models saw a
        // fifth less data than the model scored on the held-out part.
        let margin = (three_standard_errors(expected_accuracy, expected.count).powi(2)
            + three_standard_errors(expected_accuracy, observed.count).powi(2))
        .sqrt()
            + 0.02;
        let above_cut: Vec<f64> = held_out_outcomes
            .iter()
            .zip(&calibrated_outcomes)
            .filter(|(raw, _)| raw.confidence >= expected.cut)
            .map(|(_, calibrated)| f64::from(calibrated.confidence))
            .collect();
        let mean_calibrated = above_cut.iter().sum::<f64>() / above_cut.len() as f64;
        let calibrated_margin = three_standard_errors(observed_accuracy, observed.count) + 0.02;
        eprintln!(
            "most certain {:>3.0}% out of fold: cut {:.3}, expected accuracy {expected_accuracy:.3} \
             ({} items); held-out above the cut: {} items ({:.0}%), accuracy \
             {observed_accuracy:.3} (margin {margin:.3}), mean calibrated confidence \
             {mean_calibrated:.3} (margin {calibrated_margin:.3})",
            coverage * 100.0,
            expected.cut,
            expected.count,
            observed.count,
            observed.coverage * 100.0
        );
        assert!(
            (expected_accuracy - observed_accuracy).abs() <= margin,
            "coverage {coverage}: expected {expected_accuracy}, observed {observed_accuracy}"
        );
        assert!(
            (mean_calibrated - observed_accuracy).abs() <= calibrated_margin,
            "coverage {coverage}: calibrated {mean_calibrated}, observed {observed_accuracy}"
        );
    }

    let raw_table = reliability_table(&held_out_outcomes, 10)?;
    let calibrated_table = reliability_table(&calibrated_outcomes, 10)?;
    let (raw_error, calibrated_error) = (
        expected_calibration_error(&raw_table),
        expected_calibration_error(&calibrated_table),
    );
    eprintln!(
        "held-out expected calibration error: raw {raw_error:.3}, calibrated {calibrated_error:.3}"
    );
    for (name, table) in [("raw", &raw_table), ("calibrated", &calibrated_table)] {
        for bin in table {
            eprintln!(
                "  {name} [{:.1}, {:.1}): {:>3} items, mean confidence {:.3}, accuracy {:.3}",
                bin.lower, bin.upper, bin.count, bin.mean_confidence, bin.accuracy
            );
        }
    }
    // Set in advance from 300 fresh synthetic draws of the same process (never this fixture):
    // the ratio stayed below 0.5.
    assert!(
        calibrated_error < 0.6 * raw_error,
        "{calibrated_error} vs {raw_error}"
    );
    Ok(())
}

#[test]
fn isotonic_calibration_matches_scikit_learn() -> Result<()> {
    let case = fixture()?.multiclass.isotonic;
    let outcomes: Vec<ConfidenceOutcome> = case
        .confidences
        .iter()
        .zip(&case.correct)
        .map(|(&confidence, &correct)| ConfidenceOutcome {
            confidence,
            correct,
        })
        .collect();
    let calibration = IsotonicCalibration::fit(&outcomes)?;
    // scikit-learn 1.9.1 IsotonicRegression(out_of_bounds="clip") fitted on the same pairs,
    // predicting on a grid over [0, 1] and at every fitted confidence.
    let ours = case
        .queries
        .iter()
        .map(|&query| f64::from(calibration.calibrate(query)));
    let gap = max_abs_gap(ours, &case.sklearn_predictions);
    assert!(gap <= 1e-6, "{gap}");
    Ok(())
}

#[test]
fn isotonic_calibration_worked_by_hand() -> Result<()> {
    let outcome = |confidence: f32, correct: bool| ConfidenceOutcome {
        confidence,
        correct,
    };
    let outcomes = [
        outcome(0.9, true),
        outcome(0.4, false),
        outcome(0.2, true),
        outcome(0.8, true),
        outcome(0.6, false),
        outcome(0.4, true),
    ];
    // Ascending: 0.2 (1 of 1), 0.4 (1 of 2, ties pooled), 0.6 (0 of 1), 0.8 (1), 0.9 (1).
    // 1 > 1/2 pools 0.2-0.4 to 2/3; 2/3 > 0 pools 0.2-0.6 to 2/4; then 0.8 and 0.9 (both 1)
    // pool: steps [0.2, 0.6] -> 0.5 and [0.8, 0.9] -> 1.
    let calibration = IsotonicCalibration::fit(&outcomes)?;
    for (confidence, expected) in [
        (0.1, 0.5),
        (0.2, 0.5),
        (0.5, 0.5),
        (0.6, 0.5),
        (0.7, 0.75),
        (0.8, 1.0),
        (0.95, 1.0),
    ] {
        let calibrated = calibration.calibrate(confidence);
        assert!(
            (calibrated - expected).abs() < 1e-6,
            "{confidence}: {calibrated}"
        );
    }
    assert!(calibration.calibrate(f32::NAN).is_nan());
    Ok(())
}

#[test]
fn accuracy_curve_and_reliability_table_worked_by_hand() -> Result<()> {
    let outcome = |confidence: f32, correct: bool| ConfidenceOutcome {
        confidence,
        correct,
    };
    let outcomes = [
        outcome(0.95, true),
        outcome(0.9, true),
        outcome(0.8, false),
        outcome(0.8, true),
        outcome(0.6, true),
        outcome(0.55, false),
        outcome(0.3, false),
        outcome(1.0, true),
    ];
    let curve = AccuracyCurve::new(&outcomes)?;
    // Most confident first: 1.0 T, 0.95 T, 0.9 T, 0.8 F, 0.8 T, 0.6 T, 0.55 F, 0.3 F.
    let at_cut = curve.at_cut(0.85)?;
    assert_eq!((at_cut.count, at_cut.accuracy), (3, Some(1.0)));
    let at_cut = curve.at_cut(0.8)?;
    assert_eq!((at_cut.count, at_cut.accuracy), (5, Some(0.8)));
    assert_eq!(curve.at_cut(1.01)?.accuracy, None);
    // Half of 8 is 4: the 4th confidence is 0.8, and its tie comes along (5 kept, 4 correct).
    let half = curve.at_coverage(0.5)?;
    assert_eq!((half.cut, half.count, half.coverage), (0.8, 5, 0.625));
    assert_eq!(half.accuracy, Some(0.8));
    let quarter = curve.at_coverage(0.25)?;
    assert_eq!(
        (quarter.cut, quarter.count, quarter.accuracy),
        (0.95, 2, Some(1.0))
    );
    let all = curve.at_coverage(1.0)?;
    assert_eq!((all.count, all.accuracy), (8, Some(0.625)));

    // Five bins of width 0.2: [0.2, 0.4) holds 0.3 F; [0.4, 0.6) 0.55 F; [0.6, 0.8) 0.6 T;
    // [0.8, 1] holds 0.8 F, 0.8 T, 0.9 T, 0.95 T, 1.0 T (mean 0.89, accuracy 0.8).
    let table = reliability_table(&outcomes, 5)?;
    let summary: Vec<(usize, f64, f64)> = table
        .iter()
        .map(|bin| (bin.count, bin.mean_confidence, bin.accuracy))
        .collect();
    let expected = [(1, 0.3, 0.0), (1, 0.55, 0.0), (1, 0.6, 1.0), (5, 0.89, 0.8)];
    assert_eq!(summary.len(), expected.len());
    for ((count, confidence, accuracy), (want_count, want_confidence, want_accuracy)) in
        summary.into_iter().zip(expected)
    {
        assert_eq!(count, want_count);
        assert!((confidence - want_confidence).abs() < 1e-6);
        assert!((accuracy - want_accuracy).abs() < 1e-12);
    }
    assert!((table[1].lower - 0.4).abs() < 1e-12 && (table[1].upper - 0.6).abs() < 1e-12);
    // (0.3 + 0.55 + 0.4 + 5 * 0.09) / 8.
    assert!((expected_calibration_error(&table) - 0.2125).abs() < 1e-6);
    Ok(())
}

#[test]
fn invalid_inputs_are_typed_errors() {
    let options = LogisticRegressionOptions::default();
    let vectors = [1.0f32, 0.0, 0.0, 1.0, 0.6, 0.8];
    assert_eq!(
        fit_logistic_regression(&vectors, 2, &[0, 1], 2, &options),
        Err(AnalyticsError::LengthMismatch {
            what: "labels",
            found: 2,
            expected: 3
        })
    );
    assert_eq!(
        fit_logistic_regression(&vectors, 2, &[0, 1, 2], 2, &options),
        Err(AnalyticsError::ValueOutOfRange {
            what: "labels",
            row: 2,
            value: 2,
            limit: 2
        })
    );
    assert_eq!(
        fit_logistic_regression(&vectors, 2, &[0, 2, 0], 3, &options),
        Err(AnalyticsError::ClassWithoutItems { class: 1 })
    );
    assert!(matches!(
        fit_logistic_regression(&vectors, 2, &[0, 0, 0], 1, &options),
        Err(AnalyticsError::InvalidParameter {
            name: "n_classes",
            ..
        })
    ));
    let no_penalty = LogisticRegressionOptions {
        c: f64::INFINITY,
        ..options.clone()
    };
    assert!(matches!(
        fit_logistic_regression(&vectors, 2, &[0, 1, 0], 2, &no_penalty),
        Err(AnalyticsError::InvalidParameter { name: "c", .. })
    ));
    // Class 1's only item is in fold 0, so fold 0's model would never see class 1.
    assert_eq!(
        out_of_fold_logits(&vectors, 2, &[0, 1, 0], 2, &[0, 0, 1], 2, &options),
        Err(AnalyticsError::ClassMissingFromTraining { class: 1, fold: 0 })
    );
    assert_eq!(
        out_of_fold_logits(&vectors, 2, &[0, 1, 0], 2, &[0, 1, 2], 2, &options),
        Err(AnalyticsError::ValueOutOfRange {
            what: "folds",
            row: 2,
            value: 2,
            limit: 2
        })
    );
    assert!(stratified_folds(&[0, 1, 0], 2, 1, 0).is_err());
    assert!(AccuracyCurve::new(&[]).is_err());
    let out_of_range = ConfidenceOutcome {
        confidence: 1.5,
        correct: true,
    };
    assert!(AccuracyCurve::new(&[out_of_range]).is_err());
    assert!(reliability_table(&[out_of_range], 10).is_err());
    let valid = ConfidenceOutcome {
        confidence: 0.5,
        correct: true,
    };
    let curve = AccuracyCurve::new(&[valid]).expect("one valid outcome");
    assert!(curve.at_coverage(0.0).is_err() && curve.at_cut(f32::NAN).is_err());
    assert!(IsotonicCalibration::fit(&[]).is_err());
    assert!(softmax_rows(&[0.0, 1.0, 2.0], 2).is_err());
}
