//! Prometheus metrics: requests and latencies per route, images per
//! collection, jobs per state.

use std::time::Instant;

use actix_web::body::MessageBody;
use actix_web::dev::{ServiceRequest, ServiceResponse};
use actix_web::middleware::Next;
use actix_web::web;
use prometheus::{
    Encoder, HistogramOpts, HistogramVec, IntCounterVec, IntGaugeVec, Opts, Registry, TextEncoder,
};

use crate::error::ApiError;
use crate::state::AppState;

pub struct Metrics {
    registry: Registry,
    requests: IntCounterVec,
    latency: HistogramVec,
    images: IntGaugeVec,
    jobs: IntGaugeVec,
}

impl Metrics {
    pub fn new() -> Result<Self, prometheus::Error> {
        let registry = Registry::new();
        let requests = IntCounterVec::new(
            Opts::new("vitrine_http_requests_total", "HTTP requests answered"),
            &["route", "method", "status"],
        )?;
        let latency = HistogramVec::new(
            HistogramOpts::new(
                "vitrine_http_request_duration_seconds",
                "Time to answer HTTP requests",
            )
            .buckets(vec![
                0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
            ]),
            &["route", "method"],
        )?;
        let images = IntGaugeVec::new(
            Opts::new("vitrine_index_images", "Images in each collection's index"),
            &["collection"],
        )?;
        let jobs = IntGaugeVec::new(
            Opts::new("vitrine_jobs", "Background jobs remembered, by state"),
            &["state"],
        )?;
        registry.register(Box::new(requests.clone()))?;
        registry.register(Box::new(latency.clone()))?;
        registry.register(Box::new(images.clone()))?;
        registry.register(Box::new(jobs.clone()))?;
        Ok(Self {
            registry,
            requests,
            latency,
            images,
            jobs,
        })
    }

    fn observe(&self, route: &str, method: &str, status: u16, seconds: f64) {
        self.requests
            .with_label_values(&[route, method, &status.to_string()])
            .inc();
        self.latency
            .with_label_values(&[route, method])
            .observe(seconds);
    }

    /// The text exposition, with the gauges brought up to date first.
    pub fn render(&self, state: &AppState) -> Result<String, ApiError> {
        for collection in state.collections.values() {
            let images = collection.snapshot().catalog.len();
            self.images
                .with_label_values(&[collection.name.as_str()])
                .set(i64::try_from(images).unwrap_or(i64::MAX));
        }
        for (job_state, count) in state.jobs.count_by_state() {
            self.jobs
                .with_label_values(&[job_state.name()])
                .set(i64::try_from(count).unwrap_or(i64::MAX));
        }
        let mut buffer = Vec::new();
        TextEncoder::new()
            .encode(&self.registry.gather(), &mut buffer)
            .map_err(ApiError::internal)?;
        String::from_utf8(buffer).map_err(ApiError::internal)
    }
}

/// Middleware recording every request under its route pattern (never the
/// raw path, so label values stay few).
pub async fn record(
    req: ServiceRequest,
    next: Next<impl MessageBody>,
) -> Result<ServiceResponse<impl MessageBody>, actix_web::Error> {
    let started = Instant::now();
    let route = req.match_pattern().unwrap_or_else(|| "unmatched".into());
    let method = req.method().as_str().to_owned();
    let state = req.app_data::<web::Data<AppState>>().cloned();
    let response = next.call(req).await;
    if let Some(state) = state {
        let status = match &response {
            Ok(response) => response.status(),
            Err(error) => error.as_response_error().status_code(),
        };
        state.metrics.observe(
            &route,
            &method,
            status.as_u16(),
            started.elapsed().as_secs_f64(),
        );
    }
    response
}
