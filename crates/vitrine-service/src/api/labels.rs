//! Label suggestions for unlabelled images and likely mislabelled images,
//! from similarity-weighted votes of labelled neighbours.

use actix_web::{get, web, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};
use vitrine_engine::labels::{
    find_label_suspects, suggest_labels, LabelOptions, LabelSuggestion, LabelSuspect,
};

use super::{blocking, checked_k, PageWindow, State};
use crate::error::{ApiError, ErrorBody};
use crate::settings::ServeSettings;
use crate::state::BUSY_WAIT;

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct LabelParams {
    /// Labelled neighbours that vote (default 10).
    pub k: Option<usize>,
    /// Below this share of the vote no label is suggested (default 0.6).
    pub min_confidence: Option<f32>,
    /// Suspects only: the least share of the vote against the image's own label (default 0.7).
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
    fn options(&self, settings: &ServeSettings) -> Result<LabelOptions, ApiError> {
        let defaults = LabelOptions::default();
        Ok(LabelOptions {
            k: checked_k(Some(self.k.unwrap_or(defaults.k)), settings)?,
            min_confidence: share(
                "min_confidence",
                self.min_confidence,
                defaults.min_confidence,
            )?,
            min_disagreement: share(
                "min_disagreement",
                self.min_disagreement,
                defaults.min_disagreement,
            )?,
        })
    }
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
    pub items: Vec<SuggestionBody>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// A label for every unlabelled image, from its labelled neighbours.
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
    let key = (options.k, options.min_confidence.to_bits());
    let all = blocking(move || {
        collection.with_store(BUSY_WAIT, |store, snapshot| {
            collection
                .label_suggestions
                .get_or_try(snapshot.generation, key, || {
                    suggest_labels(store, &snapshot.catalog, &options)
                })
                .map_err(ApiError::from)
        })
    })
    .await?;
    Ok(HttpResponse::Ok().json(SuggestionsPage {
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
    /// Share of the neighbours' vote against the image's own label.
    pub disagreement: f32,
    /// What the neighbours say instead, when confident.
    pub suggested_label: Option<String>,
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

#[derive(Debug, Serialize, ToSchema)]
pub struct SuspectsPage {
    /// Most doubtful first.
    pub items: Vec<SuspectBody>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// Labelled images whose neighbours strongly disagree with their label.
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
    let key = (
        options.k,
        options.min_confidence.to_bits(),
        options.min_disagreement.to_bits(),
    );
    let all = blocking(move || {
        collection.with_store(BUSY_WAIT, |store, snapshot| {
            collection
                .label_suspects
                .get_or_try(snapshot.generation, key, || {
                    find_label_suspects(store, &snapshot.catalog, &options)
                })
                .map_err(ApiError::from)
        })
    })
    .await?;
    Ok(HttpResponse::Ok().json(SuspectsPage {
        items: all[window.range(all.len())]
            .iter()
            .map(SuspectBody::from)
            .collect(),
        total: all.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}
