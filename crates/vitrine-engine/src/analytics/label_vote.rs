//! Similarity-weighted k-nearest-neighbour label votes.
//!
//! Each neighbour votes for its label with weight [`neighbour_weight`]`(similarity)` =
//! `max(similarity, 0)`: a closer neighbour counts more, and a neighbour pointing away from the
//! item (cosine similarity <= 0) is no evidence at all. The winning label is the one with the
//! largest summed weight; exact ties go to the smallest label in `Ord` order, which is also
//! what scikit-learn's `KNeighborsClassifier` does (it picks the first of its sorted classes).
//! Confidence is the winner's share of the total weight, in `[0, 1]`.

use std::collections::BTreeMap;

use super::AnalyticsError;

/// One neighbour of the item being voted on: its label and its cosine similarity to the item.
#[derive(Debug, Clone, PartialEq)]
pub struct VotingNeighbour<L> {
    pub label: L,
    pub similarity: f32,
}

/// The vote weight of a neighbour at `similarity`: `max(similarity, 0)` (NaN counts as 0).
pub fn neighbour_weight(similarity: f32) -> f32 {
    if similarity > 0.0 {
        similarity
    } else {
        0.0
    }
}

/// Result of [`vote_label`].
#[derive(Debug, Clone, PartialEq)]
pub struct LabelVote<L> {
    /// Label with the largest summed weight; `None` when no neighbour had positive weight.
    pub winning_label: Option<L>,
    /// Winning weight divided by total weight (0 when there is no weight).
    pub confidence: f32,
    /// Sum of all neighbours' weights.
    pub total_weight: f32,
    /// True when there is no winner or `confidence < min_confidence`.
    pub abstained: bool,
}

impl<L> LabelVote<L> {
    /// The winning label unless the vote abstained.
    pub fn predicted_label(&self) -> Option<&L> {
        if self.abstained {
            None
        } else {
            self.winning_label.as_ref()
        }
    }
}

/// Votes on a label from `neighbours`; abstains when the winner's confidence is below
/// `min_confidence` (which must lie in `[0, 1]`).
pub fn vote_label<L: Ord + Clone>(
    neighbours: &[VotingNeighbour<L>],
    min_confidence: f32,
) -> Result<LabelVote<L>, AnalyticsError> {
    check_min_confidence(min_confidence)?;
    let (weights, total) = weight_per_label(neighbours);
    // Iterating in ascending label order and replacing only on a strictly larger weight keeps
    // the smallest label among exact ties.
    let winner = weights
        .iter()
        .fold(None, |best, (label, &weight)| match best {
            Some((_, best_weight)) if weight <= best_weight => best,
            _ if weight > 0.0 => Some((*label, weight)),
            _ => best,
        });
    Ok(match winner {
        Some((label, weight)) => {
            let confidence = (weight / total) as f32;
            LabelVote {
                winning_label: Some(label.clone()),
                confidence,
                total_weight: total as f32,
                abstained: confidence < min_confidence,
            }
        }
        None => LabelVote {
            winning_label: None,
            confidence: 0.0,
            total_weight: 0.0,
            abstained: true,
        },
    })
}

/// How strongly an item's neighbours disagree with the item's own label.
#[derive(Debug, Clone, PartialEq)]
pub struct LabelDisagreement<L> {
    /// Share of the neighbours' weight given to labels other than the item's own, in `[0, 1]`
    /// (0 when no neighbour has positive weight: no evidence against the label).
    pub disagreement: f32,
    /// The neighbours' own vote, as [`vote_label`] returns it.
    pub neighbours_vote: LabelVote<L>,
    /// The neighbours' winning label when it differs from the item's own and the vote did not
    /// abstain: the likely correct label of a mislabelled item.
    pub suggested_label: Option<L>,
}

/// Scores a labelled item against its neighbours (the item itself must not be among them).
pub fn label_disagreement<L: Ord + Clone>(
    own_label: &L,
    neighbours: &[VotingNeighbour<L>],
    min_confidence: f32,
) -> Result<LabelDisagreement<L>, AnalyticsError> {
    let neighbours_vote = vote_label(neighbours, min_confidence)?;
    let (weights, total) = weight_per_label(neighbours);
    let disagreement = if total > 0.0 {
        let own_weight = weights.get(own_label).copied().unwrap_or(0.0);
        (1.0 - own_weight / total) as f32
    } else {
        0.0
    };
    let suggested_label = neighbours_vote
        .predicted_label()
        .filter(|&label| label != own_label)
        .cloned();
    Ok(LabelDisagreement {
        disagreement,
        neighbours_vote,
        suggested_label,
    })
}

fn check_min_confidence(min_confidence: f32) -> Result<(), AnalyticsError> {
    if (0.0..=1.0).contains(&min_confidence) {
        Ok(())
    } else {
        Err(AnalyticsError::InvalidParameter {
            name: "min_confidence",
            value: min_confidence.to_string(),
            reason: "must lie in [0, 1]",
        })
    }
}

/// Summed weight per label (in f64, accumulated in neighbour order) and the overall total.
fn weight_per_label<L: Ord>(neighbours: &[VotingNeighbour<L>]) -> (BTreeMap<&L, f64>, f64) {
    let mut weights: BTreeMap<&L, f64> = BTreeMap::new();
    let mut total = 0f64;
    for neighbour in neighbours {
        let weight = f64::from(neighbour_weight(neighbour.similarity));
        *weights.entry(&neighbour.label).or_insert(0.0) += weight;
        total += weight;
    }
    (weights, total)
}
