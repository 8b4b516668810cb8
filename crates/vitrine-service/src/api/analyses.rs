//! Duplicate groups and leakage between splits.

use actix_web::{get, web, HttpResponse};
use std::sync::Arc;

use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};
use vitrine_engine::catalog::ImageRef;
use vitrine_engine::decisions::Fate;
use vitrine_engine::duplicates::{
    find_duplicates, find_leaks_verified, DuplicateGroup, DuplicateOptions, DuplicateReport,
    DuplicateTier, LabelLeaks, Leak, LeakOptions, LeakReport, SplitLeakSummary, SplitPairLeaks,
    Verification, VerificationSummary,
};
use vitrine_engine::verify::PairVerifier;

use super::{blocking, PageWindow, State};
use crate::collection::{Collection, PrecomputedReports, Snapshot};
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

/// How a near pair was accepted.
#[derive(Debug, Serialize, ToSchema)]
pub struct PairJudgement {
    /// `confirmed`: the finer check (patch correspondences and aligned
    /// pixels) confirmed it. `threshold_only`: accepted on the cosine
    /// threshold alone (verification off, no model loaded, or a file could
    /// not be read).
    pub status: JudgementStatus,
    /// For confirmed pairs: the aligned pixel correlation, up to 1.
    pub score: Option<f32>,
}

#[derive(Debug, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum JudgementStatus {
    Confirmed,
    ThresholdOnly,
}

impl From<Verification> for PairJudgement {
    fn from(verification: Verification) -> Self {
        match verification {
            Verification::Confirmed { score } => Self {
                status: JudgementStatus::Confirmed,
                score: Some(score),
            },
            Verification::ThresholdOnly => Self {
                status: JudgementStatus::ThresholdOnly,
                score: None,
            },
        }
    }
}

/// What near-pair verification did in this answer.
#[derive(Debug, Serialize, ToSchema)]
pub struct VerificationBody {
    /// Whether near pairs went through the finer check.
    pub applied: bool,
    /// Why it was not applied, or only in part.
    pub note: Option<String>,
    /// Pairs from the candidate cosine up (with verification) or from the threshold up.
    pub candidate_pairs: usize,
    pub confirmed: usize,
    /// Confirmed pairs whose cosine was below the threshold.
    pub recovered_below_threshold: usize,
    /// Pairs at or above the threshold that the check rejected.
    pub rejected_above_threshold: usize,
    /// Pairs with an unreadable file, judged on the threshold alone.
    pub unavailable: usize,
}

impl From<&VerificationSummary> for VerificationBody {
    fn from(summary: &VerificationSummary) -> Self {
        Self {
            applied: summary.applied,
            note: summary.note.clone(),
            candidate_pairs: summary.candidate_pairs,
            confirmed: summary.confirmed,
            recovered_below_threshold: summary.recovered_below_threshold,
            rejected_above_threshold: summary.rejected_above_threshold,
            unavailable: summary.unavailable,
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
    /// The strongest tier linking this member to the keeper or to a member
    /// listed before it (`copy_of`); null for the keeper.
    pub tier: Option<Tier>,
    /// The id of the member that `tier` relates this one to; null for the keeper.
    pub copy_of: Option<u64>,
    /// Cosine similarity to the keeper.
    pub similarity: f32,
    /// The suggested image to keep (nothing is deleted).
    pub keeper: bool,
    /// For near-tier members: how the near link that brought it in was judged.
    pub check: Option<PairJudgement>,
    pub width: u32,
    pub height: u32,
    pub byte_size: u64,
    /// What a person decided for this image: `keep`, `drop` or null.
    #[schema(value_type = Option<String>)]
    pub decision: Option<Fate>,
    /// The latest decision in effect on this image (0: none): send it as
    /// `seen` when deciding on it.
    pub last_decision: u64,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct DuplicateGroupBody {
    /// The weakest of the members' tiers: the whole group is at least this close.
    pub tier: Tier,
    /// The keeper first, then the others by decreasing similarity.
    pub members: Vec<GroupMember>,
    /// A person has settled the group: every member decided, or all but one dropped.
    pub decided: bool,
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
                    tier: m.tier.map(Tier::from),
                    copy_of: m.copy_of,
                    similarity: m.similarity,
                    keeper: m.keeper,
                    check: m.verification.map(PairJudgement::from),
                    width: m.width,
                    height: m.height,
                    byte_size: m.byte_size,
                    decision: m.decision,
                    last_decision: m.last_decision,
                })
                .collect(),
            decided: group.decided,
        }
    }
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct DuplicateParams {
    /// Cosine similarity at or above which images are near-duplicates.
    pub threshold: Option<f32>,
    /// Confirm near pairs with the finer check (default true; needs the
    /// collection's model). The first verified answer of a collection decodes
    /// every image in a candidate pair; later ones reuse the verdicts.
    pub verify: Option<bool>,
    /// With verification: the cosine similarity from which pairs are checked
    /// (confirmed pairs are accepted even below `threshold`).
    pub candidate_threshold: Option<f32>,
    /// Only the groups a person has not settled yet.
    pub undecided: Option<bool>,
    pub page: Option<usize>,
    pub per_page: Option<usize>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct DuplicatesPage {
    pub threshold: f32,
    pub candidate_threshold: f32,
    pub verification: VerificationBody,
    /// Largest groups first.
    pub groups: Vec<DuplicateGroupBody>,
    /// Groups in all pages (after the `undecided` filter).
    pub total: usize,
    /// Groups a person has settled, of all groups.
    pub decided: usize,
    /// Pairs left out because a person decided they are not copies.
    pub left_out_as_distinct: usize,
    pub page: usize,
    pub per_page: usize,
}

/// Which near pairs to accept, as a request asks.
pub(crate) struct NearQuery {
    pub threshold: Option<f32>,
    pub candidate_threshold: Option<f32>,
    pub verify: Option<bool>,
}

pub(crate) fn duplicate_options(
    state: &AppState,
    query: NearQuery,
) -> Result<DuplicateOptions, ApiError> {
    let defaults = &state.duplicates;
    let cosine = |name: &'static str, value: Option<f32>, default: f32| {
        let value = value.unwrap_or(default);
        if (-1.0..=1.0).contains(&value) {
            Ok(value)
        } else {
            Err(ApiError::bad_request(
                "threshold_out_of_range",
                format!("{name} is a cosine similarity between -1 and 1"),
            ))
        }
    };
    Ok(DuplicateOptions {
        near_duplicate_threshold: cosine(
            "threshold",
            query.threshold,
            defaults.near_duplicate_threshold,
        )?,
        candidate_threshold: cosine(
            "candidate_threshold",
            query.candidate_threshold,
            defaults.candidate_threshold,
        )?,
        verify: query.verify.unwrap_or(defaults.verify),
        ..defaults.clone()
    })
}

/// The collection's verifier when `options` ask for verification and the
/// loaded model made the collection's embeddings; otherwise the engine judges
/// on the threshold and says why in the answer's verification note.
fn verifier_for(
    state: &AppState,
    collection: &Collection,
    snapshot: &Snapshot,
    options: &DuplicateOptions,
) -> Option<Arc<PairVerifier>> {
    if !options.verify {
        return None;
    }
    let encoder = state.encoder_for(&snapshot.fingerprint).ok()?;
    Some(collection.verifier(encoder))
}

/// The collection's duplicate report for `options`, memoised per generation.
/// Blocks: run it off the async threads.
pub(crate) fn duplicate_report(
    state: &AppState,
    collection: &Collection,
    options: &DuplicateOptions,
) -> Result<Arc<DuplicateReport>, ApiError> {
    collection.with_store(BUSY_WAIT, |store, snapshot| {
        collection
            .duplicates
            .get_or_try(
                snapshot.generation,
                (options.clone(), collection.decisions_recorded()),
                || {
                    let verifier = verifier_for(state, collection, snapshot, options);
                    find_duplicates(store, &snapshot.catalog, options, verifier.as_deref())
                },
            )
            .map_err(ApiError::from)
    })
}

/// The collection's leak report for `options`, memoised per generation.
/// Blocks: run it off the async threads.
pub(crate) fn leak_report(
    state: &AppState,
    collection: &Collection,
    options: &LeakOptions,
) -> Result<Arc<LeakReport>, ApiError> {
    let near = &options.duplicates;
    collection.with_store(BUSY_WAIT, |store, snapshot| {
        collection
            .leaks
            .get_or_try(
                snapshot.generation,
                (options.clone(), collection.decisions_recorded()),
                || {
                    let verifier = verifier_for(state, collection, snapshot, near);
                    find_leaks_verified(store, &snapshot.catalog, options, verifier.as_deref())
                },
            )
            .map_err(ApiError::from)
    })
}

/// Computes each collection's default duplicate and leak reports on a
/// background thread, so that the first reader (often the page) finds them
/// ready instead of waiting for verification to decode every candidate image.
/// The thread holds the collections open until it ends: a service stopping
/// stops verification (`Collection::stop_verification`) and then joins it.
pub fn precompute_reports(state: web::Data<AppState>) -> Option<std::thread::JoinHandle<()>> {
    for collection in state.collections.values() {
        collection.set_precomputed_reports(PrecomputedReports::Queued);
    }
    let spawned = std::thread::Builder::new()
        .name("vitrine-precompute".into())
        .spawn(move || {
            let pool = state.background.clone();
            pool.install(|| precompute_each(&state))
        });
    spawned
        .inspect_err(|err| tracing::warn!("could not start precomputing reports: {err}"))
        .ok()
}

/// The default duplicate and leak reports of every collection, in turn.
fn precompute_each(state: &AppState) {
    for collection in state.collections.values() {
        if collection.verification_stopped() {
            return;
        }
        collection.set_precomputed_reports(PrecomputedReports::Computing);
        let started = std::time::Instant::now();
        let leak_options = LeakOptions {
            evaluated_splits: Vec::new(),
            reference_split: state.reference_split.clone(),
            duplicates: state.duplicates.clone(),
        };
        let outcome = duplicate_report(state, collection, &state.duplicates)
            .and_then(|_| leak_report(state, collection, &leak_options));
        match outcome {
            Ok(_) => {
                collection.set_precomputed_reports(PrecomputedReports::Ready);
                tracing::info!(
                    collection = %collection.name,
                    seconds = started.elapsed().as_secs_f64(),
                    "duplicate and leak reports ready"
                )
            }
            Err(err) => {
                collection.set_precomputed_reports(PrecomputedReports::Failed);
                tracing::warn!(
                    collection = %collection.name,
                    "could not precompute reports: {err}"
                )
            }
        }
    }
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
    let options = duplicate_options(
        &state,
        NearQuery {
            threshold: query.threshold,
            candidate_threshold: query.candidate_threshold,
            verify: query.verify,
        },
    )?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let threshold = options.near_duplicate_threshold;
    let candidate_threshold = options.candidate_threshold;
    let report = blocking(move || duplicate_report(&state, &collection, &options)).await?;
    let undecided = query.undecided.unwrap_or(false);
    let groups: Vec<&DuplicateGroup> = report
        .groups
        .iter()
        .filter(|group| !(undecided && group.decided))
        .collect();
    Ok(HttpResponse::Ok().json(DuplicatesPage {
        threshold,
        candidate_threshold,
        verification: (&report.verification).into(),
        groups: groups[window.range(groups.len())]
            .iter()
            .map(|group| DuplicateGroupBody::from(*group))
            .collect(),
        total: groups.len(),
        decided: report.groups.iter().filter(|g| g.decided).count(),
        left_out_as_distinct: report.left_out_as_distinct,
        page: window.page,
        per_page: window.per_page,
    }))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct LeakParams {
    /// Confirm near pairs with the finer check (default true; needs the collection's model).
    pub verify: Option<bool>,
    /// With verification: the cosine similarity from which pairs are checked.
    pub candidate_threshold: Option<f32>,
    /// Splits to check, comma-separated (default: every split but the reference).
    pub split: Option<String>,
    /// Only the leaks a person has not settled yet.
    pub undecided: Option<bool>,
    /// The reference split others are checked against (default from the
    /// configuration; unset there: each split against every split before it,
    /// train, then val, then test).
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
    /// For near-tier leaks: how the pair was judged.
    pub check: Option<PairJudgement>,
    /// A person has settled the leak: one side dropped, or the image moved to another split.
    pub decided: bool,
    /// The latest decision in effect on the image and on its counterpart (0:
    /// none): send the one decided on (the larger for both) as `seen`.
    pub image_last_decision: u64,
    pub counterpart_last_decision: u64,
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
            check: leak.verification.map(PairJudgement::from),
            decided: leak.decided,
            image_last_decision: leak.image_last_decision,
            counterpart_last_decision: leak.counterpart_last_decision,
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct LeaksPage {
    /// The split others were checked against; null: each split against every
    /// split before it (each leak's `counterpart.split` says which).
    pub reference_split: Option<String>,
    pub threshold: f32,
    pub candidate_threshold: f32,
    pub verification: VerificationBody,
    pub summary: Vec<SplitLeaks>,
    /// Leaked images per pair of splits: their own and their copy's.
    #[schema(value_type = Vec<Object>)]
    pub between: Vec<SplitPairLeaks>,
    /// Leaked images per label.
    #[schema(value_type = Vec<Object>)]
    pub per_label: Vec<LabelLeaks>,
    pub leaks: Vec<LeakBody>,
    /// Leaks in all pages (after the `undecided` filter).
    pub total: usize,
    /// Leaks a person has settled, of all leaks.
    pub decided: usize,
    /// Pairs left out because a person decided they are not copies.
    pub left_out_as_distinct: usize,
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
    let near = duplicate_options(
        &state,
        NearQuery {
            threshold: query.threshold,
            candidate_threshold: query.candidate_threshold,
            verify: query.verify,
        },
    )?;
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
        reference_split: query.against.or_else(|| state.reference_split.clone()),
        duplicates: near,
    };
    let threshold = options.duplicates.near_duplicate_threshold;
    let candidate_threshold = options.duplicates.candidate_threshold;
    let report = blocking(move || leak_report(&state, &collection, &options)).await?;
    let undecided = query.undecided.unwrap_or(false);
    let shown: Vec<&Leak> = report
        .leaks
        .iter()
        .filter(|leak| !(undecided && leak.decided))
        .collect();
    Ok(HttpResponse::Ok().json(LeaksPage {
        reference_split: report.reference_split.clone(),
        between: report.between.clone(),
        per_label: report.per_label.clone(),
        threshold,
        candidate_threshold,
        verification: (&report.verification).into(),
        summary: report.summary.iter().map(SplitLeaks::from).collect(),
        leaks: shown[window.range(shown.len())]
            .iter()
            .map(|leak| LeakBody::from(*leak))
            .collect(),
        total: shown.len(),
        decided: report.leaks.iter().filter(|l| l.decided).count(),
        left_out_as_distinct: report.left_out_as_distinct,
        page: window.page,
        per_page: window.per_page,
    }))
}
