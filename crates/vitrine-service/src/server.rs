//! Building the application and running the HTTP server.

use std::net::{IpAddr, Ipv4Addr, SocketAddr};
use std::time::Duration;

use actix_web::body::MessageBody;
use actix_web::dev::{Server, ServerHandle, ServiceRequest, ServiceResponse};
use actix_web::http::{header, StatusCode};
use actix_web::middleware::{from_fn, ErrorHandlerResponse, ErrorHandlers, Next};
use actix_web::{web, App, HttpServer, ResponseError};

use crate::api::{self, system};
use crate::discovery::{self, ServedBy};
use crate::error::{ApiError, ServiceError};
use crate::metrics;
use crate::state::{AppState, ServiceConfig};

/// The address to listen on; anything but loopback needs a token.
fn listen_address(bind: &str, token: Option<&str>) -> Result<IpAddr, ServiceError> {
    let ip = if bind == "localhost" {
        IpAddr::V4(Ipv4Addr::LOCALHOST)
    } else {
        bind.parse::<IpAddr>()
            .map_err(|e| ServiceError::BadSetting {
                name: "bind",
                reason: format!("`{bind}` is not an IP address: {e}"),
            })?
    };
    if !ip.is_loopback() && token.is_none() {
        return Err(ServiceError::PublicBindWithoutToken { bind: bind.into() });
    }
    Ok(ip)
}

/// Rewrites error responses that are not already ours (actix's own 404,
/// 405, extractor errors without a handler) into the JSON error shape.
fn json_errors<B: MessageBody + 'static>(
    res: ServiceResponse<B>,
) -> actix_web::Result<ErrorHandlerResponse<B>> {
    let is_json = res
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.starts_with("application/json"));
    if is_json {
        return Ok(ErrorHandlerResponse::Response(res.map_into_left_body()));
    }
    let status = res.status();
    let code = match status {
        StatusCode::NOT_FOUND => "not_found",
        StatusCode::METHOD_NOT_ALLOWED => "method_not_allowed",
        StatusCode::PAYLOAD_TOO_LARGE => "payload_too_large",
        StatusCode::UNSUPPORTED_MEDIA_TYPE => "unsupported_media_type",
        StatusCode::REQUEST_TIMEOUT => "request_timeout",
        s if s.is_client_error() => "bad_request",
        _ => "internal_error",
    };
    let message = status.canonical_reason().unwrap_or("error").to_owned();
    let (req, _) = res.into_parts();
    let response = ApiError::new(status, code, message).error_response();
    Ok(ErrorHandlerResponse::Response(
        ServiceResponse::new(req, response).map_into_right_body(),
    ))
}

/// Answers 503 `request_timeout` when a request takes longer than allowed.
/// (The error becomes our JSON response where actix turns errors into
/// responses; the request itself must not be cloned before routing.)
async fn time_limit(
    req: ServiceRequest,
    next: Next<impl MessageBody + 'static>,
) -> Result<ServiceResponse<impl MessageBody>, actix_web::Error> {
    let limit = req
        .app_data::<web::Data<AppState>>()
        .map_or(30, |s| s.settings.request_timeout_s);
    let request = format!("{} {}", req.method(), req.path());
    match actix_web::rt::time::timeout(Duration::from_secs(limit), next.call(req)).await {
        Ok(response) => response,
        Err(_) => Err({
            tracing::warn!(%request, limit_s = limit, "request timed out");
            ApiError::unavailable(
                "request_timeout",
                format!("the request took longer than {limit} s"),
            )
        }
        .into()),
    }
}

fn extractor_error(
    code: &'static str,
    status: StatusCode,
    err: impl std::fmt::Display,
) -> actix_web::Error {
    ApiError::new(status, code, err.to_string()).into()
}

/// Registers everything on an app: limits, error shapes, routes.
fn configure(cfg: &mut web::ServiceConfig, state: &web::Data<AppState>) {
    let limit = state.settings.max_body_bytes;
    cfg.app_data(state.clone())
        .app_data(
            web::JsonConfig::default()
                .limit(limit)
                .error_handler(move |err, _| {
                    use actix_web::error::JsonPayloadError;
                    match err {
                        JsonPayloadError::Overflow { .. }
                        | JsonPayloadError::OverflowKnownLength { .. } => {
                            ApiError::payload_too_large(limit).into()
                        }
                        JsonPayloadError::ContentType => extractor_error(
                            "unsupported_media_type",
                            StatusCode::UNSUPPORTED_MEDIA_TYPE,
                            "send JSON with Content-Type: application/json",
                        ),
                        other => extractor_error("invalid_json", StatusCode::BAD_REQUEST, other),
                    }
                }),
        )
        .app_data(web::PayloadConfig::default().limit(limit))
        .app_data(
            web::QueryConfig::default().error_handler(|err, _| {
                extractor_error("invalid_query", StatusCode::BAD_REQUEST, err)
            }),
        )
        .app_data(
            web::PathConfig::default().error_handler(|err, _| {
                extractor_error("invalid_path", StatusCode::BAD_REQUEST, err)
            }),
        )
        .configure(api::configure)
        .service(system::healthz)
        .service(system::readyz)
        .service(system::metrics)
        .service(system::openapi)
        .service(system::index)
        .service(system::static_file)
        .default_service(web::to(system::not_found));
}

fn cors(origins: &[String]) -> actix_cors::Cors {
    origins.iter().fold(
        actix_cors::Cors::default()
            .allowed_methods(["GET", "POST"])
            .allowed_headers([header::AUTHORIZATION, header::CONTENT_TYPE])
            .max_age(3600),
        |cors, origin| cors.allowed_origin(origin),
    )
}

/// A bound, not yet running server.
pub struct Service {
    server: Server,
    addrs: Vec<SocketAddr>,
    state: web::Data<AppState>,
    precompute: Option<std::thread::JoinHandle<()>>,
}

impl Service {
    /// Opens the collections and binds the listening socket. Must be called
    /// inside an actix (or tokio) runtime.
    pub fn bind(config: ServiceConfig) -> Result<Self, ServiceError> {
        let settings = config.settings.clone();
        let ip = listen_address(&settings.bind, settings.effective_token().as_deref())?;
        let state = web::Data::new(AppState::new(config)?);
        let app_state = state.clone();
        let mut server = HttpServer::new(move || {
            let state = app_state.clone();
            let origins = state.settings.cors_origins.clone();
            App::new()
                .wrap(ErrorHandlers::new().default_handler(json_errors))
                .wrap(from_fn(time_limit))
                .wrap(actix_web::middleware::Condition::new(
                    !origins.is_empty(),
                    cors(&origins),
                ))
                .wrap(from_fn(metrics::record))
                .configure(|cfg| configure(cfg, &state))
        })
        .client_request_timeout(Duration::from_secs(settings.request_timeout_s))
        .shutdown_timeout(settings.shutdown_timeout_s)
        .shutdown_signal(stop_signal());
        if settings.workers > 0 {
            server = server.workers(settings.workers);
        }
        let bind = format!("{}:{}", settings.bind, settings.port);
        let server = server
            .bind((ip, settings.port))
            .map_err(|source| ServiceError::Bind { bind, source })?;
        let addrs = server.addrs();
        announce(&state, &addrs);
        // Only once the server is certain to start: the thread keeps the
        // collections open while it works.
        let precompute = if settings.precompute {
            api::analyses::precompute_reports(state.clone())
        } else {
            None
        };
        Ok(Self {
            server: server.run(),
            addrs,
            state,
            precompute,
        })
    }

    pub fn addrs(&self) -> &[SocketAddr] {
        &self.addrs
    }

    /// Stops the server from outside (`stop(true)` is graceful).
    pub fn handle(&self) -> ServerHandle {
        self.server.handle()
    }

    /// Serves until stopped (SIGINT, SIGTERM or the handle): in-flight
    /// requests get `shutdown_timeout_s` to finish, then running background
    /// jobs are waited for so that no index run stops between two commits,
    /// and precomputation is stopped and waited for, so that the collections
    /// are closed when this returns.
    pub async fn run(self) -> Result<(), ServiceError> {
        let outcome = self.server.await.map_err(ServiceError::Run);
        for collection in self.state.collections.values() {
            if let Err(err) = ServedBy::remove(&collection.dir) {
                tracing::warn!(collection = %collection.name, "could not remove {}: {err}", discovery::FILE_NAME);
            }
        }
        for collection in self.state.collections.values() {
            collection.stop_verification();
        }
        let jobs = self.state.jobs.clone();
        let precompute = self.precompute;
        // Joining threads blocks: keep it off the runtime's thread.
        let joined = web::block(move || {
            jobs.shut_down();
            precompute.map(std::thread::JoinHandle::join)
        });
        match joined.await {
            Err(err) => tracing::error!("could not wait for background work: {err}"),
            Ok(Some(Err(_))) => tracing::error!("report precomputation panicked"),
            Ok(_) => {}
        }
        outcome
    }
}

/// Records in each collection's store folder where the service answers for
/// it, so that command-line runs on a store the service holds ask it. A
/// failure only costs that: it is logged and serving goes on.
fn announce(state: &AppState, addrs: &[SocketAddr]) {
    let Some(&addr) = addrs.first() else { return };
    for collection in state.collections.values() {
        let record = ServedBy::new(addr, &collection.name);
        if let Err(err) = record.write(&collection.dir) {
            tracing::warn!(
                collection = %collection.name,
                "could not write {} into {}: command-line runs on this store will not find the service: {err}",
                discovery::FILE_NAME,
                collection.dir.display()
            );
        }
    }
}

/// Resolves on SIGINT or SIGTERM; either starts a graceful shutdown.
async fn stop_signal() {
    let interrupt = Box::pin(async {
        if actix_web::rt::signal::ctrl_c().await.is_err() {
            std::future::pending::<()>().await;
        }
    });
    let terminate = Box::pin(async {
        match actix_web::rt::signal::unix::signal(
            actix_web::rt::signal::unix::SignalKind::terminate(),
        ) {
            Ok(mut signal) => {
                signal.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    });
    futures_util::future::select(interrupt, terminate).await;
    tracing::info!("stop signal received; shutting down gracefully");
}

/// Runs the service until it is stopped, printing where it listens.
pub fn serve(config: ServiceConfig) -> Result<(), ServiceError> {
    actix_web::rt::System::new().block_on(async move {
        let service = Service::bind(config)?;
        for addr in service.addrs() {
            println!("vitrine serves on http://{addr}/");
        }
        service.run().await
    })
}
