//! How far a classifier's confidence can be trusted, measured on out-of-fold predictions.
//!
//! - [`reliability_table`]: predictions binned by confidence, each bin's observed accuracy
//!   beside its mean confidence (a calibrated model has the two equal).
//! - [`AccuracyCurve`]: the accuracy of the predictions at or above a confidence cut, and the
//!   cut that keeps a given share of the most confident predictions.
//! - [`IsotonicCalibration`]: isotonic regression of correctness on confidence (pool adjacent
//!   violators; Ayer et al., "An empirical distribution function for sampling with incomplete
//!   information", Ann. Math. Statist. 26, 1955), a non-decreasing map from a raw confidence
//!   to the accuracy of predictions that confident.
//!
//! Why a recalibration, and why isotonic: the L2 penalty shrinks the weights and unit-length
//! embeddings give small logits, so a regularised logistic regression on them is
//! under-confident (out-of-fold mean confidence about 0.7 against accuracy about 0.9 on
//! synthetic clusters like the test fixture's). Wrong labels add a second distortion: they cap
//! the accuracy of even the most confident predictions below 1, a plateau no single rescaling
//! of the logits can produce. On fresh synthetic draws with 6% flipped labels, temperature
//! scaling (Guo et al., ICML 2017) left an expected calibration error of about 0.05 where
//! isotonic regression reached 0.04 with 240 labelled items and 0.003 with 2,000; without
//! flipped labels temperature scaling was a little better (0.017 against 0.026), but
//! collections worth checking have wrong labels. (Measured with scikit-learn's equivalents on
//! draws from the fixture generator's process, never on the fixture.) The map never reverses
//! the order of two confidences, so coverage cuts are taken on raw confidences and keep their
//! meaning after it.

use super::{count_rows, AnalyticsError};

/// One prediction: its confidence (the top class probability) and whether that class was the
/// item's label.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConfidenceOutcome {
    pub confidence: f32,
    pub correct: bool,
}

/// The top class of every row of `probabilities` (`n x n_classes`; ties go to the lowest
/// class index), scored against `labels`.
pub fn top_class_outcomes(
    probabilities: &[f32],
    n_classes: usize,
    labels: &[usize],
) -> Result<Vec<ConfidenceOutcome>, AnalyticsError> {
    let n_rows = count_rows("probabilities", probabilities, n_classes)?;
    if labels.len() != n_rows {
        return Err(AnalyticsError::LengthMismatch {
            what: "labels",
            found: labels.len(),
            expected: n_rows,
        });
    }
    Ok(probabilities
        .chunks_exact(n_classes)
        .zip(labels)
        .map(|(row, &label)| {
            let (top_class, confidence) = row.iter().enumerate().fold(
                (0, row[0]),
                |(best_class, best), (class, &probability)| {
                    if probability > best {
                        (class, probability)
                    } else {
                        (best_class, best)
                    }
                },
            );
            ConfidenceOutcome {
                confidence,
                correct: top_class == label,
            }
        })
        .collect())
}

/// One confidence bin of a [`reliability_table`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReliabilityBin {
    /// The bin holds confidences in `[lower, upper)`; the last bin also holds 1.
    pub lower: f64,
    pub upper: f64,
    pub count: usize,
    pub mean_confidence: f64,
    /// Share of the bin's predictions that were correct.
    pub accuracy: f64,
}

/// Predictions in `n_bins` equal-width confidence bins over `[0, 1]`; bins without
/// predictions are left out.
pub fn reliability_table(
    outcomes: &[ConfidenceOutcome],
    n_bins: usize,
) -> Result<Vec<ReliabilityBin>, AnalyticsError> {
    check_confidences(outcomes)?;
    if n_bins == 0 {
        return Err(AnalyticsError::InvalidParameter {
            name: "n_bins",
            value: "0".into(),
            reason: "must be at least 1",
        });
    }
    let mut counts = vec![0usize; n_bins];
    let mut confidence_sums = vec![0f64; n_bins];
    let mut correct_counts = vec![0usize; n_bins];
    for outcome in outcomes {
        let bin = ((f64::from(outcome.confidence) * n_bins as f64) as usize).min(n_bins - 1);
        counts[bin] += 1;
        confidence_sums[bin] += f64::from(outcome.confidence);
        correct_counts[bin] += usize::from(outcome.correct);
    }
    Ok((0..n_bins)
        .filter(|&bin| counts[bin] > 0)
        .map(|bin| ReliabilityBin {
            lower: bin as f64 / n_bins as f64,
            upper: (bin + 1) as f64 / n_bins as f64,
            count: counts[bin],
            mean_confidence: confidence_sums[bin] / counts[bin] as f64,
            accuracy: correct_counts[bin] as f64 / counts[bin] as f64,
        })
        .collect())
}

/// The expected calibration error of a reliability table: the gap between mean confidence
/// and accuracy, averaged over bins weighted by their counts (0 for an empty table).
pub fn expected_calibration_error(table: &[ReliabilityBin]) -> f64 {
    let total: usize = table.iter().map(|bin| bin.count).sum();
    if total == 0 {
        return 0.0;
    }
    table
        .iter()
        .map(|bin| bin.count as f64 * (bin.accuracy - bin.mean_confidence).abs())
        .sum::<f64>()
        / total as f64
}

/// The predictions at or above a confidence cut.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CoverageAccuracy {
    pub cut: f32,
    /// Predictions with confidence `>= cut`.
    pub count: usize,
    /// `count` as a share of all predictions.
    pub coverage: f64,
    /// Share of those predictions that were correct; `None` when `count` is 0.
    pub accuracy: Option<f64>,
}

/// Accuracy as a function of a confidence cut, from (out-of-fold) predictions whose
/// correctness is known.
#[derive(Debug, Clone, PartialEq)]
pub struct AccuracyCurve {
    /// Confidences, most confident first.
    confidences: Vec<f32>,
    /// `correct_so_far[j]`: correct predictions among the first `j + 1`.
    correct_so_far: Vec<usize>,
}

impl AccuracyCurve {
    /// Needs at least one prediction; confidences must lie in `[0, 1]`.
    pub fn new(outcomes: &[ConfidenceOutcome]) -> Result<Self, AnalyticsError> {
        check_confidences(outcomes)?;
        if outcomes.is_empty() {
            return Err(AnalyticsError::InvalidParameter {
                name: "outcomes",
                value: "0 predictions".into(),
                reason: "an accuracy curve needs at least one prediction",
            });
        }
        let mut sorted = outcomes.to_vec();
        sorted.sort_by(|a, b| b.confidence.total_cmp(&a.confidence));
        let correct_so_far = sorted
            .iter()
            .scan(0, |correct, outcome| {
                *correct += usize::from(outcome.correct);
                Some(*correct)
            })
            .collect();
        Ok(Self {
            confidences: sorted.iter().map(|outcome| outcome.confidence).collect(),
            correct_so_far,
        })
    }

    /// Number of predictions the curve was built from.
    pub fn len(&self) -> usize {
        self.confidences.len()
    }

    /// Always false: [`AccuracyCurve::new`] refuses an empty set.
    pub fn is_empty(&self) -> bool {
        self.confidences.is_empty()
    }

    /// The predictions with confidence `>= cut`.
    pub fn at_cut(&self, cut: f32) -> Result<CoverageAccuracy, AnalyticsError> {
        if cut.is_nan() {
            return Err(AnalyticsError::InvalidParameter {
                name: "cut",
                value: cut.to_string(),
                reason: "must be a number",
            });
        }
        let count = self
            .confidences
            .partition_point(|&confidence| confidence >= cut);
        Ok(CoverageAccuracy {
            cut,
            count,
            coverage: count as f64 / self.len() as f64,
            accuracy: count
                .checked_sub(1)
                .map(|last| self.correct_so_far[last] as f64 / count as f64),
        })
    }

    /// The cut that keeps the most confident `coverage` share (in `(0, 1]`) of the
    /// predictions: the confidence of the last one kept. Predictions tied with it are kept
    /// too, so the returned coverage can exceed the requested one.
    pub fn at_coverage(&self, coverage: f64) -> Result<CoverageAccuracy, AnalyticsError> {
        if !(coverage > 0.0 && coverage <= 1.0) {
            return Err(AnalyticsError::InvalidParameter {
                name: "coverage",
                value: coverage.to_string(),
                reason: "must lie in (0, 1]",
            });
        }
        let exact = coverage * self.len() as f64;
        // Round first when the product is an integer up to rounding, so that 0.3 of 10
        // predictions keeps 3, not 4.
        let kept = if (exact - exact.round()).abs() <= 1e-9 * exact.max(1.0) {
            exact.round()
        } else {
            exact.ceil()
        };
        let kept = (kept as usize).clamp(1, self.len());
        self.at_cut(self.confidences[kept - 1])
    }
}

fn check_confidences(outcomes: &[ConfidenceOutcome]) -> Result<(), AnalyticsError> {
    match outcomes
        .iter()
        .find(|outcome| !(0.0..=1.0).contains(&outcome.confidence))
    {
        Some(outcome) => Err(AnalyticsError::InvalidParameter {
            name: "confidence",
            value: outcome.confidence.to_string(),
            reason: "must lie in [0, 1]",
        }),
        None => Ok(()),
    }
}

/// A non-decreasing map from confidence to expected accuracy, fitted by isotonic regression
/// on (out-of-fold) predictions whose correctness is known.
///
/// Predictions with equal confidence are pooled first, so they get one value. Between the
/// confidence ranges of two fitted steps the map is linear; below the lowest and above the
/// highest fitted confidence it is constant. (scikit-learn's `IsotonicRegression(
/// out_of_bounds="clip")` has the same shape.)
#[derive(Debug, Clone, PartialEq)]
pub struct IsotonicCalibration {
    /// Steps in increasing confidence, with strictly increasing values.
    steps: Vec<IsotonicStep>,
}

/// Predictions pooled into one value: their confidences span `[lowest, highest]`.
#[derive(Debug, Clone, Copy, PartialEq)]
struct IsotonicStep {
    lowest: f32,
    highest: f32,
    correct: usize,
    count: usize,
}

impl IsotonicStep {
    fn accuracy(&self) -> f64 {
        self.correct as f64 / self.count as f64
    }
}

impl IsotonicCalibration {
    /// Needs at least one prediction; confidences must lie in `[0, 1]`.
    pub fn fit(outcomes: &[ConfidenceOutcome]) -> Result<Self, AnalyticsError> {
        check_confidences(outcomes)?;
        if outcomes.is_empty() {
            return Err(AnalyticsError::InvalidParameter {
                name: "outcomes",
                value: "0 predictions".into(),
                reason: "a calibration needs at least one prediction",
            });
        }
        let mut sorted = outcomes.to_vec();
        sorted.sort_by(|a, b| a.confidence.total_cmp(&b.confidence));
        let mut steps: Vec<IsotonicStep> = Vec::new();
        for outcome in sorted {
            let correct = usize::from(outcome.correct);
            match steps.last_mut() {
                Some(last) if last.highest == outcome.confidence => {
                    last.correct += correct;
                    last.count += 1;
                }
                _ => steps.push(IsotonicStep {
                    lowest: outcome.confidence,
                    highest: outcome.confidence,
                    correct,
                    count: 1,
                }),
            }
            // Pool adjacent violators: merge the newest step into its predecessor while the
            // predecessor is at least as accurate (comparing correct/count exactly, by
            // cross-multiplication). Equal neighbours are merged too, so values strictly
            // increase.
            while let [.., before, last] = steps.as_mut_slice() {
                let last = *last;
                if before.correct * last.count < last.correct * before.count {
                    break;
                }
                before.highest = last.highest;
                before.correct += last.correct;
                before.count += last.count;
                steps.pop();
            }
        }
        Ok(Self { steps })
    }

    /// Expected accuracy of a prediction with this raw confidence (NaN stays NaN).
    pub fn calibrate(&self, confidence: f32) -> f32 {
        if confidence.is_nan() {
            return f32::NAN;
        }
        let after = self.steps.partition_point(|step| step.highest < confidence);
        let value = match self.steps.get(after) {
            // Above every fitted confidence (`after` is then the step count, at least 1).
            None => self.steps[after - 1].accuracy(),
            Some(step) if step.lowest <= confidence || after == 0 => step.accuracy(),
            Some(above) => {
                let below = &self.steps[after - 1];
                let (low, high) = (f64::from(below.highest), f64::from(above.lowest));
                let share = (f64::from(confidence) - low) / (high - low);
                below.accuracy() + share * (above.accuracy() - below.accuracy())
            }
        };
        value as f32
    }

    /// The same predictions with calibrated confidences.
    pub fn calibrate_outcomes(&self, outcomes: &[ConfidenceOutcome]) -> Vec<ConfidenceOutcome> {
        outcomes
            .iter()
            .map(|outcome| ConfidenceOutcome {
                confidence: self.calibrate(outcome.confidence),
                correct: outcome.correct,
            })
            .collect()
    }
}
