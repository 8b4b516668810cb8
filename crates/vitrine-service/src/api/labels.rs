//! Label suggestions for unlabelled images and likely mislabelled images:
//! from a classifier trained on the collection's labels (default) or from
//! votes of labelled neighbours.

use std::sync::Arc;

use actix_web::{get, web, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};
use vitrine_engine::labels::{
    find_label_suspects, suggest_labels, LabelMethod, LabelOptions, LabelSuggestion, LabelSuspect,
    LabelSuspectCount, SuggestionReport, SuspectReport,
};

use super::{blocking, checked_k, PageWindow, State};
use crate::collection::Collection;
use crate::error::{ApiError, ErrorBody};
use crate::settings::ServeSettings;
use crate::state::BUSY_WAIT;

/// How labels are judged.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// Logistic regression trained on the collection's labels, its
    /// confidence calibrated on held-out folds (default).
    Classifier,
    /// A similarity-weighted vote of the `k` labelled nearest neighbours.
    NeighbourVote,
}

impl From<Method> for LabelMethod {
    fn from(method: Method) -> Self {
        match method {
            Method::Classifier => LabelMethod::Classifier,
            Method::NeighbourVote => LabelMethod::NeighbourVote,
        }
    }
}

impl From<LabelMethod> for Method {
    fn from(method: LabelMethod) -> Self {
        match method {
            LabelMethod::Classifier => Method::Classifier,
            LabelMethod::NeighbourVote => Method::NeighbourVote,
        }
    }
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct LabelParams {
    /// `classifier` (default) or `neighbour_vote`.
    pub method: Option<Method>,
    /// Neighbour vote: labelled neighbours that vote (default 10).
    pub k: Option<usize>,
    /// Below this confidence no label is suggested (default 0.8; classifier:
    /// calibrated probability of being right, neighbour vote: share of the vote).
    pub min_confidence: Option<f32>,
    /// Instead of `min_confidence`: suggest for this share of the unlabelled
    /// images, the most certain ones (in (0, 1]).
    pub coverage: Option<f64>,
    /// Neighbour-vote suspects only: the least share of the vote against the
    /// image's own label (default 0.7).
    pub min_disagreement: Option<f32>,
    pub page: Option<usize>,
    pub per_page: Option<usize>,
}

fn share(name: &'static str, value: Option<f32>, default: f32) -> Result<f32, ApiError> {
    let value = value.unwrap_or(default);
    if (0.0..=1.0).contains(&value) {
        Ok(value)
    } else {
        Err(ApiError::bad_request(
            "share_out_of_range",
            format!("{name} is a share between 0 and 1"),
        ))
    }
}

impl LabelParams {
    pub fn options(&self, settings: &ServeSettings) -> Result<LabelOptions, ApiError> {
        let defaults = LabelOptions::default();
        Ok(LabelOptions {
            method: self.method.map_or(defaults.method, LabelMethod::from),
            k: checked_k(Some(self.k.unwrap_or(defaults.k)), settings)?,
            min_confidence: share(
                "min_confidence",
                self.min_confidence,
                defaults.min_confidence,
            )?,
            coverage: self.coverage,
            min_disagreement: share(
                "min_disagreement",
                self.min_disagreement,
                defaults.min_disagreement,
            )?,
            seed: defaults.seed,
        })
    }
}

/// The collection's label suggestions for `options`, memoised per
/// generation. Blocks: run it off the async threads.
pub(crate) fn suggestion_report(
    collection: &Collection,
    options: &LabelOptions,
) -> Result<Arc<SuggestionReport>, ApiError> {
    collection.with_store(BUSY_WAIT, |store, snapshot| {
        collection
            .label_suggestions
            .get_or_try(snapshot.generation, options.clone(), || {
                suggest_labels(store, &snapshot.catalog, options)
            })
            .map_err(ApiError::from)
    })
}

/// The collection's likely mislabelled images for `options`, memoised per
/// generation. Blocks: run it off the async threads.
pub(crate) fn suspect_report(
    collection: &Collection,
    options: &LabelOptions,
) -> Result<Arc<SuspectReport>, ApiError> {
    collection.with_store(BUSY_WAIT, |store, snapshot| {
        collection
            .label_suspects
            .get_or_try(snapshot.generation, options.clone(), || {
                find_label_suspects(store, &snapshot.catalog, options)
            })
            .map_err(ApiError::from)
    })
}

#[derive(Debug, Serialize, ToSchema)]
pub struct SuggestionBody {
    pub id: u64,
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
    /// Absent when the vote abstained.
    pub suggested_label: Option<String>,
    /// The label with the largest share of the vote, even when abstaining.
    pub leading_label: Option<String>,
    pub confidence: f32,
    pub abstained: bool,
}

impl From<&LabelSuggestion> for SuggestionBody {
    fn from(s: &LabelSuggestion) -> Self {
        Self {
            id: s.image.id,
            path: s.image.path.clone(),
            root: s.image.root.clone(),
            split: s.image.split.clone(),
            label: s.image.label.clone(),
            suggested_label: s.suggested_label.clone(),
            leading_label: s.leading_label.clone(),
            confidence: s.confidence,
            abstained: s.abstained,
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct SuggestionsPage {
    pub method: Method,
    /// Labels are suggested from this confidence up.
    pub cut: f32,
    /// Classifier: the share of labelled images, each judged by a model that
    /// did not see it, whose leading label was right among those at or above
    /// the cut.
    pub expected_accuracy: Option<f64>,
    /// Labels left out of the classifier, and why.
    pub note: Option<String>,
    /// Most certain first.
    pub items: Vec<SuggestionBody>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// A label for every unlabelled image, most certain first.
#[utoipa::path(
    operation_id = "label_suggestions",
    tag = "labels",
    params(("collection" = String, Path, description = "Collection name"), LabelParams),
    responses(
        (status = 200, body = SuggestionsPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/labels/suggestions")]
pub async fn suggestions(
    state: State,
    path: web::Path<String>,
    query: web::Query<LabelParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let options = query.options(&state.settings)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let report = blocking(move || suggestion_report(&collection, &options)).await?;
    let all = &report.suggestions;
    Ok(HttpResponse::Ok().json(SuggestionsPage {
        method: report.method.into(),
        cut: report.cut,
        expected_accuracy: report.expected_accuracy,
        note: report.note.clone(),
        items: all[window.range(all.len())]
            .iter()
            .map(SuggestionBody::from)
            .collect(),
        total: all.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}

#[derive(Debug, Serialize, ToSchema)]
pub struct SuspectBody {
    pub id: u64,
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
    /// How strongly the rest of the collection disagrees with the image's
    /// own label: 1 minus that label's probability (classifier) or share of
    /// the vote (neighbour vote).
    pub disagreement: f32,
    /// The label the rest of the collection points to.
    pub suggested_label: Option<String>,
    /// That label's probability or share of the vote.
    pub confidence: f32,
}

impl From<&LabelSuspect> for SuspectBody {
    fn from(s: &LabelSuspect) -> Self {
        Self {
            id: s.image.id,
            path: s.image.path.clone(),
            root: s.image.root.clone(),
            split: s.image.split.clone(),
            label: s.image.label.clone(),
            disagreement: s.disagreement,
            suggested_label: s.suggested_label.clone(),
            confidence: s.confidence,
        }
    }
}

/// Suspects of one label: many read as an ambiguous class rather than as
/// many mistakes.
#[derive(Debug, Serialize, ToSchema)]
pub struct LabelSuspectCountBody {
    pub label: String,
    /// Images carrying the label.
    pub labelled: usize,
    pub suspects: usize,
}

impl From<&LabelSuspectCount> for LabelSuspectCountBody {
    fn from(count: &LabelSuspectCount) -> Self {
        Self {
            label: count.label.clone(),
            labelled: count.labelled,
            suspects: count.suspects,
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct SuspectsPage {
    pub method: Method,
    pub per_label: Vec<LabelSuspectCountBody>,
    /// Labels left out of the classifier, and why.
    pub note: Option<String>,
    /// Most doubtful first.
    pub items: Vec<SuspectBody>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// Labelled images that the rest of the collection contradicts, most doubtful first.
#[utoipa::path(
    operation_id = "label_suspects",
    tag = "labels",
    params(("collection" = String, Path, description = "Collection name"), LabelParams),
    responses(
        (status = 200, body = SuspectsPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/labels/suspects")]
pub async fn suspects(
    state: State,
    path: web::Path<String>,
    query: web::Query<LabelParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let options = query.options(&state.settings)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let report = blocking(move || suspect_report(&collection, &options)).await?;
    let all = &report.suspects;
    Ok(HttpResponse::Ok().json(SuspectsPage {
        method: report.method.into(),
        per_label: report
            .per_label
            .iter()
            .map(LabelSuspectCountBody::from)
            .collect(),
        note: report.note.clone(),
        items: all[window.range(all.len())]
            .iter()
            .map(SuspectBody::from)
            .collect(),
        total: all.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}
