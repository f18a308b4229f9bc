//! The HTTP edge: routes, handlers and the per-request span. The only module that knows
//! actix-web.
//!
//! Handlers are thin: they read the request, call one named step of the store or of
//! [`crate::domain`], and shape the answer. Errors become problem documents in [`error`].
//! `runs.rs` serves `/v1/runs`, `reports.rs` the HTML report of a run, `matrices.rs`
//! `/v1/matrices`.

mod audit;
pub mod error;
mod matrices;
mod reports;
mod runs;
mod series;
mod verifications;

use crate::config::Config;
use crate::db::Store;
use actix_web::dev::{Service, ServiceRequest};
use actix_web::{web, HttpResponse};
use error::ApiError;
use metrics_exporter_prometheus::PrometheusHandle;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::Instant;
use tokio::sync::Notify;
use tracing::Instrument;

/// The API description served at `/openapi.yaml`.
pub const OPENAPI: &str = include_str!("../../../openapi.yaml");

/// Every route the service registers: method and path template (as in `openapi.yaml`).
pub const ROUTES: &[(&str, &str)] = &[
    ("POST", "/v1/runs"),
    ("GET", "/v1/runs"),
    ("GET", "/v1/runs/{id}"),
    ("GET", "/v1/runs/{id}/report"),
    ("POST", "/v1/runs/{id}/cancel"),
    ("GET", "/v1/runs/{id}/provenance"),
    ("POST", "/v1/runs/{id}/verify"),
    ("GET", "/v1/runs/{id}/verifications"),
    ("GET", "/v1/verifications/{id}"),
    ("POST", "/v1/matrices"),
    ("GET", "/v1/matrices/{sha256}"),
    ("GET", "/v1/series"),
    ("GET", "/v1/series/{name}"),
    ("GET", "/v1/series/{name}/changes"),
    ("GET", "/v1/audit"),
    ("GET", "/v1/audit/verify"),
    ("GET", "/healthz"),
    ("GET", "/readyz"),
    ("GET", "/metrics"),
    ("GET", "/openapi.yaml"),
];

/// What every handler can reach.
#[derive(Clone)]
pub struct AppState {
    /// The job store.
    pub store: Store,
    /// The service configuration.
    pub config: Arc<Config>,
    /// Wakes idle workers after a submission.
    pub wake: Arc<Notify>,
    /// Worker loops running.
    pub workers_alive: Arc<AtomicUsize>,
    /// Renders the Prometheus text.
    pub metrics: PrometheusHandle,
}

/// Registers every route of [`ROUTES`] and the problem-document fallbacks (404 for an
/// unknown path, 405 with `Allow` for a known path with another method).
pub fn routes(cfg: &mut web::ServiceConfig) {
    cfg.service(
        resource("/v1/runs")
            .route(web::post().to(runs::create))
            .route(web::get().to(runs::list)),
    )
    .service(resource("/v1/runs/{id}").route(web::get().to(runs::get)))
    .service(resource("/v1/runs/{id}/report").route(web::get().to(reports::get)))
    .service(resource("/v1/runs/{id}/cancel").route(web::post().to(runs::cancel)))
    .service(resource("/v1/runs/{id}/provenance").route(web::get().to(runs::provenance)))
    .service(resource("/v1/runs/{id}/verify").route(web::post().to(verifications::request)))
    .service(resource("/v1/runs/{id}/verifications").route(web::get().to(verifications::of_run)))
    .service(resource("/v1/verifications/{id}").route(web::get().to(verifications::one)))
    .service(resource("/v1/matrices").route(web::post().to(matrices::create)))
    .service(resource("/v1/matrices/{sha256}").route(web::get().to(matrices::get)))
    .service(resource("/v1/series").route(web::get().to(series::list)))
    .service(resource("/v1/series/{name}").route(web::get().to(series::one)))
    .service(resource("/v1/series/{name}/changes").route(web::get().to(series::changes)))
    .service(resource("/v1/audit").route(web::get().to(audit::page)))
    .service(resource("/v1/audit/verify").route(web::get().to(audit::verify)))
    .service(resource("/healthz").route(web::get().to(healthz)))
    .service(resource("/readyz").route(web::get().to(readyz)))
    .service(resource("/metrics").route(web::get().to(metrics_text)))
    .service(resource("/openapi.yaml").route(web::get().to(openapi)))
    .default_service(web::to(not_found));
}

/// A resource at `path` whose other methods are answered 405, with `Allow` listing the
/// methods [`ROUTES`] gives the path.
fn resource(path: &str) -> actix_web::Resource {
    let allow: Vec<&str> = ROUTES
        .iter()
        .filter(|(_, p)| *p == path)
        .map(|(m, _)| *m)
        .collect();
    assert!(!allow.is_empty(), "{path} is not in ROUTES");
    let allow = allow.join(", ");
    web::resource(path).default_service(web::to(move || {
        let allow = allow.clone();
        async move { Err::<HttpResponse, _>(ApiError::MethodNotAllowed { allow }) }
    }))
}

async fn not_found() -> Result<HttpResponse, ApiError> {
    Err(ApiError::NotFound(
        "no such resource; see /openapi.yaml".to_owned(),
    ))
}

async fn healthz() -> HttpResponse {
    HttpResponse::Ok().json(serde_json::json!({ "status": "ok" }))
}

async fn readyz(state: web::Data<AppState>) -> Result<HttpResponse, ApiError> {
    if let Err(e) = state.store.check_writable().await {
        tracing::warn!(error = %e, "readiness: the database is not writable");
        return Err(ApiError::Unavailable(
            "the database is not writable".to_owned(),
        ));
    }
    let alive = state.workers_alive.load(Ordering::SeqCst);
    if alive < state.config.workers {
        return Err(ApiError::Unavailable(format!(
            "{alive} of {} workers are running",
            state.config.workers
        )));
    }
    Ok(HttpResponse::Ok().json(serde_json::json!({
        "status": "ready",
        "workers": alive,
    })))
}

/// `GET /metrics`: refreshes the gauges read from the database (runs by status, queue
/// depth), then renders every metric of the process in the Prometheus text format. If the
/// database cannot be read the other metrics are still served and the gauges keep their
/// last values.
async fn metrics_text(state: web::Data<AppState>) -> HttpResponse {
    match state.store.run_counts().await {
        Ok(counts) => {
            for status in crate::domain::RunStatus::ALL {
                metrics::gauge!("demefix_runs", "status" => status.as_str())
                    .set(counts.of(status) as f64);
            }
            metrics::gauge!("demefix_queue_depth").set(counts.queued as f64);
        }
        Err(e) => tracing::warn!(error = %e, "metrics: cannot count the runs"),
    }
    HttpResponse::Ok()
        .content_type("text/plain; version=0.0.4")
        .body(state.metrics.render())
}

async fn openapi() -> HttpResponse {
    HttpResponse::Ok()
        .content_type("application/yaml")
        .body(OPENAPI)
}

/// Wraps every request in a span (method, path, status) and records its latency.
pub fn request_span<S, B>(
    req: ServiceRequest,
    srv: &S,
) -> impl std::future::Future<Output = Result<S::Response, S::Error>>
where
    S: Service<
        ServiceRequest,
        Response = actix_web::dev::ServiceResponse<B>,
        Error = actix_web::Error,
    >,
{
    let span = tracing::info_span!(
        "request",
        method = %req.method(),
        path = %req.path(),
        status = tracing::field::Empty,
    );
    let started = Instant::now();
    let route = req
        .match_pattern()
        .unwrap_or_else(|| "unmatched".to_owned());
    let method = req.method().to_string();
    let fut = span.in_scope(|| srv.call(req));
    async move {
        let res = fut.await;
        let status = match &res {
            Ok(r) => r.status().as_u16(),
            Err(e) => e.as_response_error().status_code().as_u16(),
        };
        tracing::Span::current().record("status", status);
        let seconds = started.elapsed().as_secs_f64();
        metrics::histogram!(
            "demefix_http_request_duration_seconds",
            "method" => method,
            "route" => route,
            "status" => status.to_string()
        )
        .record(seconds);
        tracing::info!(status, ms = seconds * 1e3, "request");
        res
    }
    .instrument(span)
}
