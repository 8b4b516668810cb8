//! Label suggestions from labelled neighbours (a similarity-weighted k-NN
//! vote with a confidence, abstaining when unsure) and the reverse view:
//! labelled images whose neighbours disagree with their label.

use serde::Serialize;
use vitrine_store::{ImageId, Store};

use crate::analytics::label_vote::{label_disagreement, vote_label, VotingNeighbour};
use crate::catalog::{Catalog, ImageRef};
use crate::error::EngineError;
use crate::neighbours::check_k;

#[derive(Clone, Debug)]
pub struct LabelOptions {
    /// Labelled neighbours that vote.
    pub k: usize,
    /// Below this share of the vote, no label is suggested.
    pub min_confidence: f32,
    /// Labelled images whose neighbours give their own label at most
    /// `1 - min_disagreement` of the vote are listed as likely mislabels.
    pub min_disagreement: f32,
}

impl Default for LabelOptions {
    fn default() -> Self {
        Self {
            k: 10,
            min_confidence: 0.6,
            min_disagreement: 0.7,
        }
    }
}

#[derive(Clone, Debug, Serialize)]
pub struct LabelSuggestion {
    #[serde(flatten)]
    pub image: ImageRef,
    /// `None` when the vote abstained.
    pub suggested_label: Option<String>,
    /// The leading label's share of the vote, even when abstaining.
    pub leading_label: Option<String>,
    pub confidence: f32,
    pub abstained: bool,
}

#[derive(Clone, Debug, Serialize)]
pub struct LabelSuspect {
    #[serde(flatten)]
    pub image: ImageRef,
    /// Share of the neighbours' vote against the image's own label.
    pub disagreement: f32,
    /// What the neighbours say instead (if confident).
    pub suggested_label: Option<String>,
    pub confidence: f32,
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
    let hits = store.search(catalog.embedding_at(row), k, Some(&accepts))?;
    Ok(hits
        .into_iter()
        .filter_map(|(id, similarity)| {
            Some(VotingNeighbour {
                label: catalog.record(id)?.label.clone()?,
                similarity,
            })
        })
        .collect())
}

fn invalid(e: crate::analytics::AnalyticsError) -> EngineError {
    EngineError::InvalidArgument(e.to_string())
}

impl LabelOptions {
    /// `Ok` for options that can give an answer: at least one voter, shares
    /// between 0 and 1.
    fn check(&self) -> Result<(), EngineError> {
        check_k(self.k)?;
        for (name, share) in [
            ("min_confidence", self.min_confidence),
            ("min_disagreement", self.min_disagreement),
        ] {
            if !(0.0..=1.0).contains(&share) {
                return Err(EngineError::InvalidArgument(format!(
                    "{name} is a share of the vote between 0 and 1, not {share}"
                )));
            }
        }
        Ok(())
    }
}

/// The suggestion for one image (labelled or not).
pub fn suggest_label(
    store: &Store,
    catalog: &Catalog,
    id: ImageId,
    options: &LabelOptions,
) -> Result<LabelSuggestion, EngineError> {
    options.check()?;
    let row = catalog.row(id).ok_or(EngineError::UnknownImage(id))?;
    let neighbours = labelled_neighbours(store, catalog, row, options.k)?;
    let vote = vote_label(&neighbours, options.min_confidence).map_err(invalid)?;
    Ok(LabelSuggestion {
        image: catalog.image_ref(row),
        suggested_label: vote.predicted_label().cloned(),
        leading_label: vote.winning_label.clone(),
        confidence: vote.confidence,
        abstained: vote.abstained,
    })
}

/// Suggestions for every unlabelled image.
pub fn suggest_labels(
    store: &Store,
    catalog: &Catalog,
    options: &LabelOptions,
) -> Result<Vec<LabelSuggestion>, EngineError> {
    (0..catalog.len())
        .filter(|&row| catalog.records[row].label.is_none())
        .map(|row| suggest_label(store, catalog, catalog.ids[row], options))
        .collect()
}

/// Labelled images whose neighbours strongly disagree, most doubtful first.
pub fn find_label_suspects(
    store: &Store,
    catalog: &Catalog,
    options: &LabelOptions,
) -> Result<Vec<LabelSuspect>, EngineError> {
    options.check()?;
    let mut suspects = Vec::new();
    for row in 0..catalog.len() {
        let Some(own_label) = catalog.records[row].label.as_ref() else {
            continue;
        };
        let neighbours = labelled_neighbours(store, catalog, row, options.k)?;
        let verdict =
            label_disagreement(own_label, &neighbours, options.min_confidence).map_err(invalid)?;
        if verdict.disagreement >= options.min_disagreement {
            suspects.push(LabelSuspect {
                image: catalog.image_ref(row),
                disagreement: verdict.disagreement,
                suggested_label: verdict.suggested_label,
                confidence: verdict.neighbours_vote.confidence,
            });
        }
    }
    suspects.sort_by(|a, b| b.disagreement.total_cmp(&a.disagreement));
    Ok(suspects)
}
