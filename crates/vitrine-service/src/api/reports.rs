//! Whole reports as the engine writes them: what a command-line run sends
//! here when this service holds its store (see `discovery.rs`), so that the
//! command prints the same answer it would have computed itself.

use actix_web::{post, web, HttpResponse};
use serde::Serialize;
use vitrine_engine::decisions::DecisionState;
use vitrine_engine::duplicates::{DuplicateOptions, LeakOptions};
use vitrine_engine::labels::LabelOptions;
use vitrine_engine::questions::{NeighbourQuery, Question};
use vitrine_engine::status::{CollectionStatus, StatusSource};

use super::analyses::{duplicate_options, duplicate_report, leak_report, NearQuery};
use super::clusters::{clustering, ClusterParams};
use super::labels::{suggestion_report, suspect_report, LabelParams};
use super::{blocking, checked_k, State};
use crate::collection::Query;
use crate::error::{ApiError, ErrorBody};
use crate::state::{AppState, BUSY_WAIT};

/// One whole report, in the engine's own format (the one `vitrine … --format
/// json` prints): the body names the question and its options, for example
/// `{"question": "duplicates", "options": {…}}`. A read: no token needed.
#[utoipa::path(
    operation_id = "collection_report",
    tag = "analyses",
    params(("collection" = String, Path, description = "Collection name")),
    request_body(content = Object, description = "A question and its options, as the engine's `Question` type serialises"),
    responses(
        (status = 200, description = "The engine's report", body = Object),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 409, description = "The loaded model is not the collection's", body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[post("/collections/{collection}/reports")]
pub async fn report(
    state: State,
    path: web::Path<String>,
    question: web::Json<Question>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let question = checked(&state, question.into_inner())?;
    let body = blocking(move || {
        let snapshot = collection.snapshot();
        match question {
            Question::Status { list_errors } => {
                collection.with_store(BUSY_WAIT, |store, snapshot| {
                    let decisions = DecisionState::load(store, &snapshot.catalog)?.counts();
                    json(&CollectionStatus::new(
                        &StatusSource {
                            catalog: &snapshot.catalog,
                            errors: &snapshot.errors,
                            fingerprint: &snapshot.fingerprint,
                            roots: &snapshot.roots,
                            index_disk_bytes: snapshot.index_disk_bytes,
                            decisions,
                        },
                        list_errors,
                    ))
                })
            }
            Question::Neighbours { of, k, filter } => {
                let neighbours = match &of {
                    NeighbourQuery::Image(id) => collection.nearest(Query::Image(*id), k, &filter),
                    NeighbourQuery::Path(path) => {
                        let id = snapshot.catalog.id_of_path(path)?;
                        collection.nearest(Query::Image(id), k, &filter)
                    }
                    NeighbourQuery::Vector(vector) => {
                        collection.nearest(Query::Vector(vector), k, &filter)
                    }
                }?;
                json(&neighbours)
            }
            Question::Duplicates(options) => {
                json(&*duplicate_report(&state, &collection, &options)?)
            }
            Question::Leaks(options) => json(&*leak_report(&state, &collection, &options)?),
            Question::Clusters(options) => json(&*clustering(&collection, &snapshot, &options)?),
            Question::LabelSuggestions(options) => {
                json(&*suggestion_report(&collection, &options)?)
            }
            Question::LabelSuspects(options) => json(&*suspect_report(&collection, &options)?),
        }
    })
    .await?;
    Ok(HttpResponse::Ok()
        .content_type("application/json")
        .body(body))
}

fn json(value: &impl Serialize) -> Result<String, ApiError> {
    serde_json::to_string(value).map_err(ApiError::internal)
}

/// The question with its options held to the same bounds as the paged
/// endpoints' parameters.
fn checked(state: &AppState, question: Question) -> Result<Question, ApiError> {
    let settings = &state.settings;
    Ok(match question {
        Question::Neighbours { of, k, filter } => Question::Neighbours {
            of,
            k: checked_k(Some(k), settings)?,
            filter,
        },
        Question::Duplicates(options) => Question::Duplicates(checked_near(state, options)?),
        Question::Leaks(options) => Question::Leaks(LeakOptions {
            duplicates: checked_near(state, options.duplicates)?,
            ..options
        }),
        Question::Clusters(options) => Question::Clusters(
            ClusterParams {
                k: options.n_clusters,
                seed: Some(options.seed),
            }
            .options(settings)?,
        ),
        Question::LabelSuggestions(options) => {
            Question::LabelSuggestions(checked_labels(state, options)?)
        }
        Question::LabelSuspects(options) => {
            Question::LabelSuspects(checked_labels(state, options)?)
        }
        status @ Question::Status { .. } => status,
    })
}

fn checked_near(state: &AppState, options: DuplicateOptions) -> Result<DuplicateOptions, ApiError> {
    let bounded = duplicate_options(
        state,
        NearQuery {
            threshold: Some(options.near_duplicate_threshold),
            candidate_threshold: Some(options.candidate_threshold),
            verify: Some(options.verify),
        },
    )?;
    Ok(DuplicateOptions {
        neighbours_per_image: checked_k(Some(options.neighbours_per_image), &state.settings)?,
        ..bounded
    })
}

fn checked_labels(state: &AppState, options: LabelOptions) -> Result<LabelOptions, ApiError> {
    let bounded = LabelParams {
        method: Some(options.method.into()),
        k: Some(options.k),
        min_confidence: Some(options.min_confidence),
        coverage: options.coverage,
        min_disagreement: Some(options.min_disagreement),
        page: None,
        per_page: None,
    }
    .options(&state.settings)?;
    Ok(LabelOptions {
        seed: options.seed,
        ..bounded
    })
}
