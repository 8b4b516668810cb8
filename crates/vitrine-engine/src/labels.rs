//! Label suggestions for unlabelled images and the reverse view, labelled
//! images that the rest of the collection contradicts.
//!
//! The default method learns from the collection's own labels: a regularised
//! multinomial logistic regression on the standardised embeddings. Every labelled image is
//! also judged by a model that did not see it (stratified folds), and those
//! out-of-fold judgements do two jobs: they calibrate the confidence of a
//! suggestion (isotonic regression of correctness on confidence, so that
//! "confidence 0.8" means right about 8 times in 10 on this collection) and
//! they find likely mislabels (confident learning, Northcutt et al., JAIR
//! 2021: an image is a suspect when another label's out-of-fold probability
//! reaches that label's own average on the images that carry it).
//!
//! The neighbour vote (a similarity-weighted k-NN vote) is kept as a method
//! of its own; it needs no training and answers on any collection.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};
use vitrine_store::{ImageId, Store};

use crate::analytics::calibration::{top_class_outcomes, AccuracyCurve, IsotonicCalibration};
use crate::analytics::cross_validation::{out_of_fold_logits, stratified_folds};
use crate::analytics::label_vote::{label_disagreement, vote_label, VotingNeighbour};
use crate::analytics::logistic::{softmax_rows, LogisticRegressionOptions};
use crate::catalog::{Catalog, ImageRef};
use crate::error::EngineError;
use crate::neighbours::check_k;

/// How labels are judged.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LabelMethod {
    /// Logistic regression trained on the collection's labels, calibrated on
    /// held-out folds.
    #[default]
    Classifier,
    /// A similarity-weighted vote of the labelled nearest neighbours.
    NeighbourVote,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LabelOptions {
    pub method: LabelMethod,
    /// Neighbour vote: labelled neighbours that vote.
    pub k: usize,
    /// Below this confidence no label is suggested (classifier: calibrated
    /// probability of being right; neighbour vote: share of the vote).
    pub min_confidence: f32,
    /// Instead of `min_confidence`: suggest for this share of the unlabelled
    /// images, the most certain ones.
    pub coverage: Option<f64>,
    /// Neighbour vote: labelled images whose neighbours give their own label
    /// at most `1 - min_disagreement` of the vote are suspects.
    pub min_disagreement: f32,
    /// Seed of the folds (classifier).
    pub seed: u64,
}

impl Default for LabelOptions {
    fn default() -> Self {
        Self {
            method: LabelMethod::Classifier,
            k: 10,
            min_confidence: 0.8,
            coverage: None,
            min_disagreement: 0.7,
            seed: 7,
        }
    }
}

/// Folds of the out-of-fold judgements: five, as is common practice for
/// cross-validation on collections of hundreds to thousands of items.
const FOLDS: usize = 5;

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LabelSuggestion {
    #[serde(flatten)]
    pub image: ImageRef,
    /// `None` when the confidence is below the cut.
    pub suggested_label: Option<String>,
    /// The most likely label, even when abstaining.
    pub leading_label: Option<String>,
    pub confidence: f32,
    pub abstained: bool,
}

/// Suggestions for every unlabelled image and what the cut means.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SuggestionReport {
    pub method: LabelMethod,
    /// Suggestions are made from this confidence up.
    pub cut: f32,
    /// Classifier: the share of labelled images, judged out of fold, whose
    /// leading label was right among those at or above the cut.
    pub expected_accuracy: Option<f64>,
    /// Labels left out of the classifier, and why.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    pub suggestions: Vec<LabelSuggestion>,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LabelSuspect {
    #[serde(flatten)]
    pub image: ImageRef,
    /// How strongly the rest of the collection disagrees with the image's
    /// own label: 1 minus that label's probability (classifier) or share of
    /// the vote (neighbour vote).
    pub disagreement: f32,
    /// The label the rest of the collection points to.
    pub suggested_label: Option<String>,
    /// That label's probability or share of the vote.
    pub confidence: f32,
}

/// Suspects of one label.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LabelSuspectCount {
    pub label: String,
    /// Images carrying the label.
    pub labelled: usize,
    pub suspects: usize,
}

/// Likely mislabels, most doubtful first, with counts per label: a label
/// with many suspects reads as an ambiguous class rather than as many
/// mistakes.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SuspectReport {
    pub method: LabelMethod,
    pub per_label: Vec<LabelSuspectCount>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    pub suspects: Vec<LabelSuspect>,
}

impl LabelOptions {
    /// `Ok` for options that can give an answer.
    fn check(&self) -> Result<(), EngineError> {
        check_k(self.k)?;
        for (name, share) in [
            ("min_confidence", self.min_confidence),
            ("min_disagreement", self.min_disagreement),
        ] {
            if !(0.0..=1.0).contains(&share) {
                return Err(EngineError::InvalidArgument(format!(
                    "{name} lies between 0 and 1, not {share}"
                )));
            }
        }
        if let Some(coverage) = self.coverage {
            if !(coverage > 0.0 && coverage <= 1.0) {
                return Err(EngineError::InvalidArgument(format!(
                    "coverage is a share of the unlabelled images above 0 and at most 1, not {coverage}"
                )));
            }
        }
        Ok(())
    }
}

/// The classifier's view of a collection: which labels it learns, and the
/// out-of-fold probabilities of every labelled image it learned from.
struct Classifier {
    /// Label names by class index.
    classes: Vec<String>,
    /// Labelled catalog rows it learned from, and their classes.
    rows: Vec<usize>,
    row_classes: Vec<usize>,
    /// `rows.len() x classes.len()`: each from a model that did not see the row.
    out_of_fold: Vec<f32>,
    /// `unlabelled.len() x classes.len()`: the fold models' mean.
    unlabelled: Vec<usize>,
    unlabelled_probabilities: Vec<f32>,
    /// Labels with too few images to learn and judge out of fold.
    left_out: Vec<String>,
}

impl Classifier {
    fn fit(catalog: &Catalog, seed: u64) -> Result<Self, EngineError> {
        let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
        for label in catalog.records.iter().filter_map(|r| r.label.as_deref()) {
            *counts.entry(label).or_default() += 1;
        }
        // A label needs an image in every fold's training part and one to hold out.
        let (kept, left_out): (Vec<_>, Vec<_>) = counts.into_iter().partition(|&(_, n)| n >= 2);
        if kept.len() < 2 {
            return Err(EngineError::InvalidArgument(format!(
                "the classifier needs at least two labels with two or more images each; the \
                 collection has {}: use the neighbour vote instead",
                kept.len()
            )));
        }
        let classes: Vec<String> = kept.iter().map(|&(l, _)| l.to_owned()).collect();
        let class_of = |label: &str| classes.iter().position(|c| c == label);
        let mut rows = Vec::new();
        let mut row_classes = Vec::new();
        let mut unlabelled = Vec::new();
        for (row, record) in catalog.records.iter().enumerate() {
            match record.label.as_deref() {
                None => unlabelled.push(row),
                Some(label) => {
                    if let Some(class) = class_of(label) {
                        rows.push(row);
                        row_classes.push(class);
                    }
                }
            }
        }
        let dim = catalog.dim;
        let standard = Standardisation::of(catalog, &rows);
        let vectors = standard.vectors(catalog, &rows);
        let n_classes = classes.len();
        let options = LogisticRegressionOptions::default();
        let folds = stratified_folds(&row_classes, n_classes, FOLDS, seed)?;
        let fitted = out_of_fold_logits(
            &vectors,
            dim,
            &row_classes,
            n_classes,
            &folds,
            FOLDS,
            &options,
        )?;
        let out_of_fold = softmax_rows(&fitted.logits, n_classes)?;
        // The fold models, averaged, judge the unlabelled images: a model
        // fitted on every labelled image would be more confident than the
        // out-of-fold judgements the calibration learned from.
        let unlabelled_vectors = standard.vectors(catalog, &unlabelled);
        let mut unlabelled_probabilities = vec![0f32; unlabelled.len() * n_classes];
        for model in fitted.models.iter().filter(|_| !unlabelled.is_empty()) {
            let probabilities = model.probabilities(&unlabelled_vectors)?;
            for (total, p) in unlabelled_probabilities.iter_mut().zip(probabilities) {
                *total += p / fitted.models.len() as f32;
            }
        }
        Ok(Self {
            classes,
            rows,
            row_classes,
            out_of_fold,
            unlabelled,
            unlabelled_probabilities,
            left_out: left_out.iter().map(|&(l, _)| l.to_owned()).collect(),
        })
    }

    fn note(&self) -> Option<String> {
        (!self.left_out.is_empty()).then(|| {
            format!(
                "labels with a single image are not learned (suggest them by hand or use the \
                 neighbour vote): {}",
                self.left_out.join(", ")
            )
        })
    }

    fn suggest(
        &self,
        catalog: &Catalog,
        options: &LabelOptions,
    ) -> Result<SuggestionReport, EngineError> {
        let n_classes = self.classes.len();
        let outcomes = top_class_outcomes(&self.out_of_fold, n_classes, &self.row_classes)?;
        let calibration = IsotonicCalibration::fit(&outcomes)?;
        let calibrated = AccuracyCurve::new(&calibration.calibrate_outcomes(&outcomes))?;
        let mut suggestions: Vec<LabelSuggestion> = self
            .unlabelled
            .iter()
            .zip(self.unlabelled_probabilities.chunks_exact(n_classes))
            .map(|(&row, probabilities)| {
                let (class, probability) = top_class(probabilities);
                LabelSuggestion {
                    image: catalog.image_ref(row),
                    suggested_label: None,
                    leading_label: Some(self.classes[class].clone()),
                    confidence: calibration.calibrate(probability),
                    abstained: true,
                }
            })
            .collect();
        let cut = apply_cut(&mut suggestions, options);
        Ok(SuggestionReport {
            method: LabelMethod::Classifier,
            cut,
            expected_accuracy: calibrated.at_cut(cut)?.accuracy,
            note: self.note(),
            suggestions,
        })
    }

    /// Image `i` labelled `y` is a suspect when another label `j` is more
    /// probable out of fold than `y`, or reaches label `j`'s threshold (the
    /// mean probability of `j` over the images labelled `j`: confident
    /// learning's rule); it points to the most probable other label, and
    /// suspects are ranked by `1 - p(y)` (the self-confidence ranking of
    /// Northcutt et al.), which on the labelled digits of the test suite put
    /// more planted mislabels first than the margin `p(j) - p(y)` did.
    fn suspects(&self, catalog: &Catalog) -> SuspectReport {
        let n_classes = self.classes.len();
        let mut sums = vec![0.0f64; n_classes];
        let mut counts = vec![0usize; n_classes];
        for (probabilities, &class) in self
            .out_of_fold
            .chunks_exact(n_classes)
            .zip(&self.row_classes)
        {
            sums[class] += f64::from(probabilities[class]);
            counts[class] += 1;
        }
        let thresholds: Vec<f32> = sums
            .iter()
            .zip(&counts)
            .map(|(&sum, &n)| (sum / n as f64) as f32)
            .collect();
        let mut ranked: Vec<(f32, LabelSuspect)> = Vec::new();
        let mut suspects_per_class = vec![0usize; n_classes];
        for ((&row, &own), probabilities) in self
            .rows
            .iter()
            .zip(&self.row_classes)
            .zip(self.out_of_fold.chunks_exact(n_classes))
        {
            let other = (0..n_classes)
                .filter(|&j| j != own)
                .max_by(|&a, &b| probabilities[a].total_cmp(&probabilities[b]));
            let suspect = other.filter(|&j| {
                probabilities[j] > probabilities[own] || probabilities[j] >= thresholds[j]
            });
            if let Some(other) = suspect {
                suspects_per_class[own] += 1;
                ranked.push((
                    1.0 - probabilities[own],
                    LabelSuspect {
                        image: catalog.image_ref(row),
                        disagreement: 1.0 - probabilities[own],
                        suggested_label: Some(self.classes[other].clone()),
                        confidence: probabilities[other],
                    },
                ));
            }
        }
        ranked.sort_by(|a, b| b.0.total_cmp(&a.0));
        SuspectReport {
            method: LabelMethod::Classifier,
            per_label: self
                .classes
                .iter()
                .enumerate()
                .map(|(class, label)| LabelSuspectCount {
                    label: label.clone(),
                    labelled: counts[class],
                    suspects: suspects_per_class[class],
                })
                .collect(),
            note: self.note(),
            suspects: ranked.into_iter().map(|(_, suspect)| suspect).collect(),
        }
    }
}

/// Per-dimension centring and scaling, measured on the labelled images.
/// Embeddings are unit vectors whose coordinates are small (about
/// `1/sqrt(dim)`), so with scikit-learn's default `C = 1` the L2 penalty
/// flattens an unscaled model to near-uniform probabilities; standardised
/// features are the common practice that makes `C = 1` a sensible default.
struct Standardisation {
    mean: Vec<f32>,
    /// 1 / standard deviation (1 for a dimension that does not vary).
    inverse_std: Vec<f32>,
}

impl Standardisation {
    fn of(catalog: &Catalog, rows: &[usize]) -> Self {
        let dim = catalog.dim;
        let n = rows.len().max(1) as f64;
        let mut sum = vec![0f64; dim];
        let mut sum_of_squares = vec![0f64; dim];
        for &row in rows {
            for (d, &x) in catalog.embedding_at(row).iter().enumerate() {
                sum[d] += f64::from(x);
                sum_of_squares[d] += f64::from(x) * f64::from(x);
            }
        }
        let mean: Vec<f64> = sum.iter().map(|s| s / n).collect();
        let inverse_std = sum_of_squares
            .iter()
            .zip(&mean)
            .map(|(sq, m)| {
                let std = (sq / n - m * m).max(0.0).sqrt();
                if std > 1e-12 {
                    (1.0 / std) as f32
                } else {
                    1.0
                }
            })
            .collect();
        Self {
            mean: mean.into_iter().map(|m| m as f32).collect(),
            inverse_std,
        }
    }

    /// The standardised embeddings of `rows`, row-major.
    fn vectors(&self, catalog: &Catalog, rows: &[usize]) -> Vec<f32> {
        rows.iter()
            .flat_map(|&row| {
                catalog
                    .embedding_at(row)
                    .iter()
                    .zip(self.mean.iter().zip(&self.inverse_std))
                    .map(|(&x, (&m, &s))| (x - m) * s)
            })
            .collect()
    }
}

/// The most probable class of a non-empty row and its probability; ties go
/// to the lowest class index.
fn top_class(probabilities: &[f32]) -> (usize, f32) {
    probabilities.iter().enumerate().skip(1).fold(
        (0, probabilities[0]),
        |(best_class, best), (class, &probability)| {
            if probability > best {
                (class, probability)
            } else {
                (best_class, best)
            }
        },
    )
}

/// Suggests the leading label from the cut up (`min_confidence`, or the cut
/// that `coverage` asks for) and abstains below it; most certain first.
/// Returns the cut.
fn apply_cut(suggestions: &mut [LabelSuggestion], options: &LabelOptions) -> f32 {
    let cut = match options.coverage {
        None => options.min_confidence,
        Some(coverage) => cut_for_coverage(suggestions, coverage),
    };
    for suggestion in suggestions.iter_mut() {
        suggestion.abstained = suggestion.confidence < cut;
        suggestion.suggested_label = if suggestion.abstained {
            None
        } else {
            suggestion.leading_label.clone()
        };
    }
    suggestions.sort_by(|a, b| b.confidence.total_cmp(&a.confidence));
    cut
}

/// The confidence of the last suggestion kept when the most certain
/// `coverage` share of them are (ties kept too).
fn cut_for_coverage(suggestions: &[LabelSuggestion], coverage: f64) -> f32 {
    let mut confidences: Vec<f32> = suggestions.iter().map(|s| s.confidence).collect();
    confidences.sort_by(|a, b| b.total_cmp(a));
    let kept =
        ((coverage * confidences.len() as f64).ceil() as usize).clamp(1, confidences.len().max(1));
    confidences.get(kept - 1).copied().unwrap_or(1.0)
}

fn labelled_neighbours(
    store: &Store,
    catalog: &Catalog,
    row: usize,
    k: usize,
) -> Result<Vec<VotingNeighbour<String>>, EngineError> {
    let own_id = catalog.ids[row];
    let accepts =
        |id: ImageId| id != own_id && catalog.record(id).is_some_and(|r| r.label.is_some());
    let hits = catalog.nearest_rows(store, catalog.embedding_at(row), k, Some(&accepts))?;
    Ok(hits
        .into_iter()
        .filter_map(|(other, similarity)| {
            Some(VotingNeighbour {
                label: catalog.records[other].label.clone()?,
                similarity,
            })
        })
        .collect())
}

/// The neighbour vote's suggestion for one image (labelled or not).
pub fn suggest_label(
    store: &Store,
    catalog: &Catalog,
    id: ImageId,
    options: &LabelOptions,
) -> Result<LabelSuggestion, EngineError> {
    options.check()?;
    let row = catalog.row(id).ok_or(EngineError::UnknownImage(id))?;
    let neighbours = labelled_neighbours(store, catalog, row, options.k)?;
    let vote = vote_label(&neighbours, options.min_confidence)?;
    Ok(LabelSuggestion {
        image: catalog.image_ref(row),
        suggested_label: vote.predicted_label().cloned(),
        leading_label: vote.winning_label.clone(),
        confidence: vote.confidence,
        abstained: vote.abstained,
    })
}

/// Suggestions for every unlabelled image, most certain first.
pub fn suggest_labels(
    store: &Store,
    catalog: &Catalog,
    options: &LabelOptions,
) -> Result<SuggestionReport, EngineError> {
    options.check()?;
    match options.method {
        LabelMethod::Classifier => {
            Classifier::fit(catalog, options.seed)?.suggest(catalog, options)
        }
        LabelMethod::NeighbourVote => {
            let by_vote = LabelOptions {
                coverage: None,
                ..options.clone()
            };
            let mut suggestions = (0..catalog.len())
                .filter(|&row| catalog.records[row].label.is_none())
                .map(|row| suggest_label(store, catalog, catalog.ids[row], &by_vote))
                .collect::<Result<Vec<_>, _>>()?;
            let cut = apply_cut(&mut suggestions, options);
            Ok(SuggestionReport {
                method: LabelMethod::NeighbourVote,
                cut,
                expected_accuracy: None,
                note: None,
                suggestions,
            })
        }
    }
}

/// Labelled images that the rest of the collection contradicts, most
/// doubtful first.
pub fn find_label_suspects(
    store: &Store,
    catalog: &Catalog,
    options: &LabelOptions,
) -> Result<SuspectReport, EngineError> {
    options.check()?;
    match options.method {
        LabelMethod::Classifier => Ok(Classifier::fit(catalog, options.seed)?.suspects(catalog)),
        LabelMethod::NeighbourVote => neighbour_vote_suspects(store, catalog, options),
    }
}

fn neighbour_vote_suspects(
    store: &Store,
    catalog: &Catalog,
    options: &LabelOptions,
) -> Result<SuspectReport, EngineError> {
    let mut suspects = Vec::new();
    let mut per_label: BTreeMap<String, LabelSuspectCount> = BTreeMap::new();
    for row in 0..catalog.len() {
        let Some(own_label) = catalog.records[row].label.as_ref() else {
            continue;
        };
        let count = per_label
            .entry(own_label.clone())
            .or_insert_with(|| LabelSuspectCount {
                label: own_label.clone(),
                labelled: 0,
                suspects: 0,
            });
        count.labelled += 1;
        let neighbours = labelled_neighbours(store, catalog, row, options.k)?;
        let verdict = label_disagreement(own_label, &neighbours, options.min_confidence)?;
        if verdict.disagreement >= options.min_disagreement {
            count.suspects += 1;
            suspects.push(LabelSuspect {
                image: catalog.image_ref(row),
                disagreement: verdict.disagreement,
                suggested_label: verdict.suggested_label,
                confidence: verdict.neighbours_vote.confidence,
            });
        }
    }
    suspects.sort_by(|a, b| b.disagreement.total_cmp(&a.disagreement));
    Ok(SuspectReport {
        method: LabelMethod::NeighbourVote,
        per_label: per_label.into_values().collect(),
        note: None,
        suspects,
    })
}
