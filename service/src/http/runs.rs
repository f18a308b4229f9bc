//! Handlers of `/v1/runs`: submit (including the answer of a reused run), fetch one, list,
//! cancel; and the body reading shared with `/v1/matrices`.

use super::error::ApiError;
use super::AppState;
use crate::db::{Cancelled, RunRecord, Submitted};
use crate::domain::{self, ListQuery, RunStatus, RunSummary, RunView, DEFAULT_PAGE, MAX_PAGE};
use actix_web::http::header::{self, HeaderValue};
use actix_web::http::StatusCode;
use actix_web::{web, HttpRequest, HttpResponse};
use futures_util::StreamExt;

/// Seconds a client should wait before polling a run that is not finished.
const RETRY_AFTER_SECS: &str = "1";
/// How many bytes of an oversize body are read (and dropped) before answering 413, so the
/// client is not reset mid-send; beyond this the connection is closed.
const DRAIN_FACTOR: usize = 4;

/// Reads the body, answering 413 above `limit` bytes.
pub(super) async fn read_body(
    req: &HttpRequest,
    mut payload: web::Payload,
    limit: usize,
) -> Result<web::Bytes, ApiError> {
    let declared = req
        .headers()
        .get(header::CONTENT_LENGTH)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.parse::<usize>().ok());
    if declared.is_some_and(|n| n > limit.saturating_mul(DRAIN_FACTOR)) {
        return Err(ApiError::PayloadTooLarge { limit });
    }
    let mut body = web::BytesMut::new();
    let mut seen = 0usize;
    while let Some(chunk) = payload.next().await {
        let chunk =
            chunk.map_err(|e| ApiError::BadRequest(format!("cannot read the body: {e}")))?;
        seen = seen.saturating_add(chunk.len());
        if seen > limit.saturating_mul(DRAIN_FACTOR) {
            break;
        }
        if seen <= limit {
            body.extend_from_slice(&chunk);
        }
    }
    if seen > limit {
        return Err(ApiError::PayloadTooLarge { limit });
    }
    Ok(body.freeze())
}

fn idempotency_key(req: &HttpRequest) -> Result<Option<String>, ApiError> {
    let Some(value) = req.headers().get("idempotency-key") else {
        return Ok(None);
    };
    let key = value
        .to_str()
        .ok()
        .filter(|k| domain::is_valid_idempotency_key(k))
        .ok_or_else(|| {
            ApiError::BadRequest(format!(
                "Idempotency-Key must be 1 to {} visible ASCII characters",
                domain::MAX_IDEMPOTENCY_KEY
            ))
        })?;
    Ok(Some(key.to_owned()))
}

/// The run document as JSON bytes.
pub(super) fn document(run: &RunRecord) -> Result<Vec<u8>, ApiError> {
    let view = RunView::new(run).map_err(ApiError::internal)?;
    serde_json::to_vec(&view).map_err(ApiError::internal)
}

fn location(run: &RunRecord) -> String {
    format!("/v1/runs/{}", run.id)
}

/// Whether the request says `Cache-Control: no-cache` (RFC 9111, section 5.2.1.4): the
/// client wants the run computed, not answered from an earlier run's results.
fn refuses_reuse(req: &HttpRequest) -> bool {
    req.headers()
        .get_all(header::CACHE_CONTROL)
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(','))
        .any(|d| d.trim().eq_ignore_ascii_case("no-cache"))
}

/// `POST /v1/runs`: `202` with the run; a run answered from an earlier run's results
/// (`reused_from`) is already `succeeded` in that answer.
pub async fn create(
    state: web::Data<AppState>,
    req: HttpRequest,
    payload: web::Payload,
) -> Result<HttpResponse, ApiError> {
    let key = idempotency_key(&req)?;
    let body = read_body(&req, payload, state.config.body_limit).await?;
    let mut new =
        domain::prepare_submission(&state.store, body.to_vec(), key, state.config.limits())
            .await
            .map_err(|e| match e {
                domain::SubmissionError::Invalid(doc) => ApiError::InvalidJob(doc),
                other => ApiError::internal(other),
            })?;
    new.allow_reuse = !refuses_reuse(&req);
    let (run, replayed) = match state.store.submit(&new).await.map_err(ApiError::internal)? {
        Submitted::Created(run) => {
            state.wake.notify_waiters();
            metrics::counter!("demefix_runs_submitted_total").increment(1);
            tracing::info!(run_id = %run.id, "run queued");
            (run, false)
        }
        Submitted::Reused(run) => {
            metrics::counter!("demefix_runs_submitted_total").increment(1);
            metrics::counter!("demefix_runs_reused_total").increment(1);
            tracing::info!(
                run_id = %run.id,
                reused_from = run.reused_from.as_deref().unwrap_or_default(),
                "run answered from an earlier run's results"
            );
            (run, false)
        }
        Submitted::Existing(run) => (run, true),
        Submitted::KeyReused(run_id) => return Err(ApiError::IdempotencyKeyReused { run_id }),
    };
    let mut response = HttpResponse::Accepted();
    response
        .insert_header((header::LOCATION, location(&run)))
        .content_type("application/json");
    if !run.status.is_finished() {
        response.insert_header((header::RETRY_AFTER, RETRY_AFTER_SECS));
    }
    if replayed {
        response.insert_header(("Idempotent-Replayed", "true"));
    }
    Ok(response.body(document(&run)?))
}

pub(super) fn parse_id(id: &str) -> Result<String, ApiError> {
    uuid::Uuid::parse_str(id)
        .map(|u| u.hyphenated().to_string())
        .map_err(|_| ApiError::NotFound(format!("no run has the id `{id}`")))
}

/// The run named by the path segment `id` (404 when the id is malformed or unknown).
pub(super) async fn find(state: &AppState, id: &str) -> Result<RunRecord, ApiError> {
    let id = parse_id(id)?;
    state
        .store
        .run(&id)
        .await
        .map_err(ApiError::internal)?
        .ok_or_else(|| ApiError::NotFound(format!("no run has the id `{id}`")))
}

/// `GET /v1/runs/{id}/provenance`: the W3C PROV-JSON document of a succeeded run
/// ([`crate::prov`]); `409` before it has succeeded.
pub async fn provenance(
    state: web::Data<AppState>,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let run = find(&state, &id).await?;
    let doc = crate::prov::document(&run).map_err(|e| match e {
        crate::prov::ProvError::NotSucceeded(_) => ApiError::Conflict(e.to_string()),
        crate::prov::ProvError::Unreadable(_) => ApiError::internal(e),
    })?;
    Ok(HttpResponse::Ok().json(doc))
}

/// `GET /v1/runs/{id}`: strong `ETag` (and `304` on `If-None-Match`) once finished.
pub async fn get(
    state: web::Data<AppState>,
    req: HttpRequest,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let run = find(&state, &id).await?;
    let bytes = document(&run)?;
    let mut response = HttpResponse::Ok();
    response.content_type("application/json");
    if run.status.is_finished() {
        let etag = strong_etag(&bytes);
        let matches = etag_matches(&req, &etag);
        response.insert_header((header::ETAG, etag.clone()));
        if matches {
            return Ok(HttpResponse::NotModified()
                .insert_header((header::ETAG, etag))
                .finish());
        }
    } else {
        response
            .insert_header((header::RETRY_AFTER, RETRY_AFTER_SECS))
            .insert_header((header::CACHE_CONTROL, HeaderValue::from_static("no-store")));
    }
    Ok(response.body(bytes))
}

/// The strong entity tag of a body: its SHA-256, quoted.
pub(super) fn strong_etag(bytes: &[u8]) -> String {
    format!("\"{}\"", crate::provenance::sha256_hex(bytes))
}

/// Whether `If-None-Match` names `etag` (or is `*`).
pub(super) fn etag_matches(req: &HttpRequest, etag: &str) -> bool {
    req.headers()
        .get_all(header::IF_NONE_MATCH)
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(','))
        .any(|t| t.trim() == etag || t.trim() == "*")
}

/// Query of `GET /v1/runs`.
#[derive(Debug)]
pub struct ListParams {
    limit: Option<String>,
    after: Option<String>,
    status: Option<String>,
    series: Option<String>,
    since: Option<String>,
}

impl ListParams {
    fn into_query(self) -> Result<ListQuery, ApiError> {
        let limit = match self.limit {
            None => DEFAULT_PAGE,
            Some(t) => t
                .parse::<u32>()
                .ok()
                .filter(|n| (1..=MAX_PAGE).contains(n))
                .ok_or_else(|| {
                    ApiError::BadRequest(format!(
                        "limit must be a whole number from 1 to {MAX_PAGE}"
                    ))
                })?,
        };
        let after = self
            .after
            .map(|a| {
                uuid::Uuid::parse_str(&a)
                    .map(|u| u.hyphenated().to_string())
                    .map_err(|_| ApiError::BadRequest("after must be a run id".to_owned()))
            })
            .transpose()?;
        let status = self
            .status
            .map(|s| {
                RunStatus::parse(&s).ok_or_else(|| {
                    ApiError::BadRequest(
                        "status must be one of queued, running, succeeded, failed, cancelled"
                            .to_owned(),
                    )
                })
            })
            .transpose()?;
        let since = self
            .since
            .map(|s| {
                chrono::DateTime::parse_from_rfc3339(&s)
                    .map(|t| {
                        t.with_timezone(&chrono::Utc)
                            .to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
                    })
                    .map_err(|_| {
                        ApiError::BadRequest("since must be an RFC 3339 timestamp".to_owned())
                    })
            })
            .transpose()?;
        Ok(ListQuery {
            limit,
            after,
            status,
            series: self.series,
            since,
        })
    }
}

/// `GET /v1/runs`: newest first; `next` is the cursor of the following page.
pub async fn list(
    state: web::Data<AppState>,
    query: web::Query<Vec<(String, String)>>,
) -> Result<HttpResponse, ApiError> {
    let mut params = ListParams {
        limit: None,
        after: None,
        status: None,
        series: None,
        since: None,
    };
    for (k, v) in query.into_inner() {
        let slot = match k.as_str() {
            "limit" => &mut params.limit,
            "after" => &mut params.after,
            "status" => &mut params.status,
            "series" => &mut params.series,
            "since" => &mut params.since,
            other => {
                return Err(ApiError::BadRequest(format!(
                    "unknown query parameter `{other}`"
                )))
            }
        };
        *slot = Some(v);
    }
    let query = params.into_query()?;
    let runs = state.store.list(&query).await.map_err(ApiError::internal)?;
    let next = (runs.len() == query.limit as usize)
        .then(|| runs.last().map(|r| r.id.clone()))
        .flatten();
    let items: Vec<RunSummary<'_>> = runs.iter().map(RunSummary::from).collect();
    Ok(HttpResponse::Ok().json(serde_json::json!({ "runs": items, "next": next })))
}

/// `POST /v1/runs/{id}/cancel`: a queued run is cancelled at once (200), a running one stops
/// within a chunk (202); a run that already succeeded or failed is a 409.
pub async fn cancel(
    state: web::Data<AppState>,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let id = parse_id(&id)?;
    match state.store.cancel(&id).await.map_err(ApiError::internal)? {
        Cancelled::NotFound => Err(ApiError::NotFound(format!("no run has the id `{id}`"))),
        Cancelled::AlreadyFinished(run) => Err(ApiError::Conflict(format!(
            "run {} already {}; finished runs cannot change",
            run.id,
            run.status.as_str()
        ))),
        Cancelled::Run(run) => {
            let status = if run.status.is_finished() {
                StatusCode::OK
            } else {
                StatusCode::ACCEPTED
            };
            Ok(HttpResponse::build(status)
                .content_type("application/json")
                .insert_header((header::LOCATION, location(&run)))
                .body(document(&run)?))
        }
    }
}
