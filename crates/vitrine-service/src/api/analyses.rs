//! Duplicate groups and leakage between splits.

use actix_web::{get, web, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};
use vitrine_engine::catalog::ImageRef;
use vitrine_engine::duplicates::{
    find_duplicate_groups, find_leaks, DuplicateGroup, DuplicateOptions, DuplicateTier, Leak,
    LeakOptions, SplitLeakSummary,
};

use super::{blocking, PageWindow, State};
use crate::error::{ApiError, ErrorBody};
use crate::state::{AppState, BUSY_WAIT};

/// An image as results name it.
#[derive(Debug, Serialize, ToSchema)]
pub struct ImageBrief {
    pub id: u64,
    /// Relative to `root`, `/`-separated.
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
}

impl From<&ImageRef> for ImageBrief {
    fn from(image: &ImageRef) -> Self {
        Self {
            id: image.id,
            path: image.path.clone(),
            root: image.root.clone(),
            split: image.split.clone(),
            label: image.label.clone(),
        }
    }
}

/// How strongly two images are the same picture.
#[derive(Debug, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Tier {
    /// Byte-for-byte identical files.
    Bytes,
    /// Different files with identical decoded pixels.
    Pixels,
    /// Embeddings at or above the near-duplicate threshold.
    Near,
}

impl From<DuplicateTier> for Tier {
    fn from(tier: DuplicateTier) -> Self {
        match tier {
            DuplicateTier::Bytes => Tier::Bytes,
            DuplicateTier::Pixels => Tier::Pixels,
            DuplicateTier::Near => Tier::Near,
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct GroupMember {
    pub id: u64,
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
    /// How this member relates to the keeper.
    pub tier: Tier,
    /// Cosine similarity to the keeper.
    pub similarity: f32,
    /// The suggested image to keep (nothing is deleted).
    pub keeper: bool,
    pub width: u32,
    pub height: u32,
    pub byte_size: u64,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct DuplicateGroupBody {
    /// The weakest tier linking a member to the keeper.
    pub tier: Tier,
    /// The keeper first, then the others by decreasing similarity.
    pub members: Vec<GroupMember>,
}

impl From<&DuplicateGroup> for DuplicateGroupBody {
    fn from(group: &DuplicateGroup) -> Self {
        Self {
            tier: group.tier.into(),
            members: group
                .members
                .iter()
                .map(|m| GroupMember {
                    id: m.image.id,
                    path: m.image.path.clone(),
                    root: m.image.root.clone(),
                    split: m.image.split.clone(),
                    label: m.image.label.clone(),
                    tier: m.tier.into(),
                    similarity: m.similarity,
                    keeper: m.keeper,
                    width: m.width,
                    height: m.height,
                    byte_size: m.byte_size,
                })
                .collect(),
        }
    }
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct DuplicateParams {
    /// Cosine similarity at or above which images are near-duplicates.
    pub threshold: Option<f32>,
    pub page: Option<usize>,
    pub per_page: Option<usize>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct DuplicatesPage {
    pub threshold: f32,
    /// Largest groups first.
    pub groups: Vec<DuplicateGroupBody>,
    /// Groups in all pages.
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

fn duplicate_options(
    state: &AppState,
    threshold: Option<f32>,
) -> Result<DuplicateOptions, ApiError> {
    let threshold = threshold.unwrap_or(state.duplicates.near_duplicate_threshold);
    if !(-1.0..=1.0).contains(&threshold) {
        return Err(ApiError::bad_request(
            "threshold_out_of_range",
            "threshold is a cosine similarity between -1 and 1",
        ));
    }
    Ok(DuplicateOptions {
        near_duplicate_threshold: threshold,
        ..state.duplicates.clone()
    })
}

/// Groups of identical and near-duplicate images (a report: nothing is deleted).
#[utoipa::path(
    operation_id = "duplicate_groups",
    tag = "analyses",
    params(("collection" = String, Path, description = "Collection name"), DuplicateParams),
    responses(
        (status = 200, body = DuplicatesPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/duplicates")]
pub async fn duplicates(
    state: State,
    path: web::Path<String>,
    query: web::Query<DuplicateParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let options = duplicate_options(&state, query.threshold)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let threshold = options.near_duplicate_threshold;
    let groups = blocking(move || {
        collection.with_store(BUSY_WAIT, |store, snapshot| {
            collection
                .duplicates
                .get_or_try(snapshot.generation, threshold.to_bits(), || {
                    find_duplicate_groups(store, &snapshot.catalog, &options)
                })
                .map_err(ApiError::from)
        })
    })
    .await?;
    Ok(HttpResponse::Ok().json(DuplicatesPage {
        threshold,
        groups: groups[window.range(groups.len())]
            .iter()
            .map(DuplicateGroupBody::from)
            .collect(),
        total: groups.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct LeakParams {
    /// Splits to check, comma-separated (default: every split but the reference).
    pub split: Option<String>,
    /// The reference split others are checked against (default from the configuration, usually `train`).
    pub against: Option<String>,
    /// Cosine similarity at or above which images are near-duplicates.
    pub threshold: Option<f32>,
    pub page: Option<usize>,
    pub per_page: Option<usize>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct SplitLeaks {
    pub split: String,
    pub images: usize,
    pub leaked: usize,
    pub leaked_percent: f64,
}

impl From<&SplitLeakSummary> for SplitLeaks {
    fn from(s: &SplitLeakSummary) -> Self {
        Self {
            split: s.split.clone(),
            images: s.images,
            leaked: s.leaked,
            leaked_percent: s.leaked_percent,
        }
    }
}

/// An image of an evaluated split with a copy in the reference split.
#[derive(Debug, Serialize, ToSchema)]
pub struct LeakBody {
    pub id: u64,
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
    /// Its closest copy in the reference split.
    pub counterpart: ImageBrief,
    pub tier: Tier,
    pub similarity: f32,
}

impl From<&Leak> for LeakBody {
    fn from(leak: &Leak) -> Self {
        Self {
            id: leak.image.id,
            path: leak.image.path.clone(),
            root: leak.image.root.clone(),
            split: leak.image.split.clone(),
            label: leak.image.label.clone(),
            counterpart: (&leak.counterpart).into(),
            tier: leak.tier.into(),
            similarity: leak.similarity,
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct LeaksPage {
    pub reference_split: String,
    pub threshold: f32,
    pub summary: Vec<SplitLeaks>,
    pub leaks: Vec<LeakBody>,
    /// Leaks in all pages.
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// Images of evaluated splits that have a copy in the reference split.
#[utoipa::path(
    operation_id = "split_leaks",
    tag = "analyses",
    params(("collection" = String, Path, description = "Collection name"), LeakParams),
    responses(
        (status = 200, body = LeaksPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/leaks")]
pub async fn leaks(
    state: State,
    path: web::Path<String>,
    query: web::Query<LeakParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let near = duplicate_options(&state, query.threshold)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let query = query.into_inner();
    let mut evaluated_splits: Vec<String> = query
        .split
        .iter()
        .flat_map(|s| s.split(','))
        .map(|s| s.trim().to_owned())
        .filter(|s| !s.is_empty())
        .collect();
    evaluated_splits.sort();
    evaluated_splits.dedup();
    let options = LeakOptions {
        evaluated_splits,
        reference_split: query
            .against
            .unwrap_or_else(|| state.reference_split.clone()),
        duplicates: near,
    };
    let threshold = options.duplicates.near_duplicate_threshold;
    let key = (
        options.evaluated_splits.clone(),
        options.reference_split.clone(),
        threshold.to_bits(),
    );
    let report = blocking(move || {
        collection.with_store(BUSY_WAIT, |store, snapshot| {
            collection
                .leaks
                .get_or_try(snapshot.generation, key, || {
                    find_leaks(store, &snapshot.catalog, &options)
                })
                .map_err(ApiError::from)
        })
    })
    .await?;
    Ok(HttpResponse::Ok().json(LeaksPage {
        reference_split: report.reference_split.clone(),
        threshold,
        summary: report.summary.iter().map(SplitLeaks::from).collect(),
        leaks: report.leaks[window.range(report.leaks.len())]
            .iter()
            .map(LeakBody::from)
            .collect(),
        total: report.leaks.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}
