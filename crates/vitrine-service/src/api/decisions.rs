//! A person's decisions on a collection: the log, recording (and undoing)
//! one, and the clean training list that follows from them.

use actix_web::http::header;
use actix_web::{get, post, web, HttpRequest, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;
use vitrine_engine::decisions::{self, DecisionCounts, DecisionState, LoggedDecision, Request};

use super::{authorise, blocking, State};
use crate::error::{ApiError, ErrorBody};
use crate::state::{AppState, BUSY_WAIT};

#[derive(Debug, Deserialize, ToSchema)]
pub struct DecisionBody {
    /// `action` and what it names, by root-relative paths as reports print
    /// them: `drop` / `keep` (`path`), `distinct` (`first`, `second`: not
    /// copies), `label` (`path`, `label`), `reject_suggestion` (`path`),
    /// `split` (`path`, `split`), `undo` (`decision`: its number).
    #[serde(flatten)]
    #[schema(value_type = Object)]
    pub request: Request,
    /// The latest decision number on these images that you saw (0: none).
    /// When another decision was recorded on them since, nothing is recorded
    /// and the answer is 409.
    pub seen: Option<u64>,
    /// Who decides (default: `token` with the bearer token, `page` from the page).
    pub by: Option<String>,
}

/// Who may record a decision, and under which name. With a token, the bearer
/// token. Without one the server listens on loopback only, and a decision
/// must carry this process's page key (`GET /api/v1/page-key`, which only a
/// page of this server, or a local program, can read) and, from a browser,
/// come from this server's own origin: another web site open in the same
/// browser can do neither.
fn decision_author(
    req: &HttpRequest,
    state: &AppState,
    by: Option<String>,
) -> Result<String, ApiError> {
    if state.token.is_some() {
        authorise(req, state)?;
        return Ok(by.unwrap_or_else(|| "token".into()));
    }
    let forbidden = |code: &'static str, message: &str| {
        ApiError::new(
            actix_web::http::StatusCode::FORBIDDEN,
            code,
            message.to_owned(),
        )
    };
    check_loopback_host(req)?;
    let key = req
        .headers()
        .get(PAGE_KEY_HEADER)
        .and_then(|value| value.to_str().ok());
    if key != Some(state.page_key.as_str()) {
        return Err(forbidden(
            "page_key_required",
            "without a token, decisions are accepted from this server's page only \
             (send the key of GET /api/v1/page-key in the X-Vitrine-Page-Key header)",
        ));
    }
    if let Some(origin) = req.headers().get(header::ORIGIN) {
        let host = req.connection_info().host().to_owned();
        if origin.to_str().ok() != Some(format!("http://{host}").as_str()) {
            return Err(forbidden(
                "foreign_origin",
                "decisions are accepted from this server's own page only",
            ));
        }
    }
    Ok(by.unwrap_or_else(|| "page".into()))
}

pub const PAGE_KEY_HEADER: &str = "x-vitrine-page-key";

/// The request named this server by a loopback name, so it cannot come from
/// a foreign name made to point at this machine.
fn check_loopback_host(req: &HttpRequest) -> Result<(), ApiError> {
    let info = req.connection_info();
    let host = info.host();
    let name = host
        .rsplit_once(':')
        .filter(|(_, port)| port.chars().all(|c| c.is_ascii_digit()))
        .map_or(host, |(name, _)| name);
    if matches!(name, "127.0.0.1" | "localhost" | "[::1]") {
        Ok(())
    } else {
        Err(ApiError::new(
            actix_web::http::StatusCode::FORBIDDEN,
            "foreign_host",
            format!("this server answers writes without a token only under a loopback name, not `{host}`"),
        ))
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct PageKey {
    pub key: String,
}

/// The key the page sends with its decisions when no token is configured.
#[utoipa::path(
    operation_id = "page_key",
    tag = "decisions",
    responses(
        (status = 200, body = PageKey),
        (status = 403, description = "Asked under a name that is not loopback", body = ErrorBody),
    )
)]
#[get("/page-key")]
pub async fn page_key(req: HttpRequest, state: State) -> Result<HttpResponse, ApiError> {
    check_loopback_host(&req)?;
    Ok(HttpResponse::Ok().json(PageKey {
        key: state.page_key.clone(),
    }))
}

#[derive(Debug, Serialize, ToSchema)]
pub struct DecisionLog {
    #[schema(value_type = Object)]
    pub counts: DecisionCounts,
    /// Every decision in the order made, with `undone_by` and `stale`.
    #[schema(value_type = Vec<Object>)]
    pub decisions: Vec<LoggedDecision>,
}

/// The collection's decision log.
#[utoipa::path(
    operation_id = "list_decisions",
    tag = "decisions",
    params(("collection" = String, Path, description = "Collection name")),
    responses(
        (status = 200, body = DecisionLog),
        (status = 404, body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/decisions")]
pub async fn list(state: State, path: web::Path<String>) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let log = blocking(move || {
        collection.with_store(BUSY_WAIT, |store, snapshot| {
            let state = DecisionState::load(store, &snapshot.catalog)?;
            Ok(DecisionLog {
                counts: state.counts(),
                decisions: state.log,
            })
        })
    })
    .await?;
    Ok(HttpResponse::Ok().json(log))
}

/// Records a decision (durable when answered). Writes need the bearer token,
/// or, without a token, the page key from this server's own page.
#[utoipa::path(
    operation_id = "record_decision",
    tag = "decisions",
    params(("collection" = String, Path, description = "Collection name")),
    request_body = DecisionBody,
    responses(
        (status = 201, description = "The recorded decision with its number", body = Object),
        (status = 400, body = ErrorBody),
        (status = 401, body = ErrorBody),
        (status = 403, body = ErrorBody),
        (status = 404, description = "Unknown collection or path", body = ErrorBody),
        (status = 409, description = "Another decision was recorded on these images after the one `seen`", body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    ),
    security(("bearer" = []))
)]
#[post("/collections/{collection}/decisions")]
pub async fn record(
    req: HttpRequest,
    state: State,
    path: web::Path<String>,
    body: web::Json<DecisionBody>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let DecisionBody { request, seen, by } = body.into_inner();
    let by = decision_author(&req, &state, by)?;
    let recorded = blocking(move || {
        let action = request.resolve(&collection.snapshot().catalog)?;
        collection.record_decision(&by, action, seen)
    })
    .await?;
    Ok(HttpResponse::Created().json(recorded))
}

/// The clean training list: CSV `path,split,label` as `vitrine index
/// --manifest` reads it, with dropped images left out and given splits and
/// labels applied.
#[utoipa::path(
    operation_id = "clean_manifest",
    tag = "decisions",
    params(("collection" = String, Path, description = "Collection name")),
    responses(
        (status = 200, description = "CSV with a header row", content_type = "text/csv", body = String),
        (status = 404, body = ErrorBody),
        (status = 503, description = "An index job is writing the collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/manifest")]
pub async fn manifest(state: State, path: web::Path<String>) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let name = collection.name.clone();
    let csv = blocking(move || {
        collection.with_store(BUSY_WAIT, |store, snapshot| {
            let state = DecisionState::load(store, &snapshot.catalog)?;
            let mut csv = Vec::new();
            decisions::write_manifest(
                &decisions::clean_manifest(&snapshot.catalog, &state),
                &mut csv,
            )?;
            Ok(csv)
        })
    })
    .await?;
    Ok(HttpResponse::Ok()
        .content_type("text/csv; charset=utf-8")
        .insert_header((
            header::CONTENT_DISPOSITION,
            format!("attachment; filename=\"{name}-training-list.csv\""),
        ))
        .body(csv))
}
