//! Handlers of re-verification: `POST /v1/runs/{id}/verify` queues a check run that recomputes
//! the run's stored spec with its recorded seed and method; `GET /v1/runs/{id}/verifications`
//! and `GET /v1/verifications/{check_run_id}` answer how it compared.

use super::error::ApiError;
use super::runs::{find, parse_id};
use super::AppState;
use crate::db::Submitted;
use crate::domain::{self, RunStatus};
use actix_web::http::header;
use actix_web::{web, HttpResponse};

/// `POST /v1/runs/{id}/verify`: `202` with the verification (status `pending`) and the
/// `Location` of the verification; `409` unless the run has succeeded.
pub async fn request(
    state: web::Data<AppState>,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let run = find(&state, &id).await?;
    if run.status != RunStatus::Succeeded {
        return Err(ApiError::Conflict(format!(
            "run {} is {}; only succeeded runs can be re-verified",
            run.id,
            run.status.as_str()
        )));
    }
    let limits = state.config.limits();
    let (original, spec) = (run.id.clone(), run.spec.clone());
    let new = web::block(move || domain::prepare_verification(&original, &spec, &limits))
        .await
        .map_err(ApiError::internal)?
        .map_err(|doc| {
            ApiError::Conflict(format!(
                "the stored spec of run {} no longer validates, so it cannot be recomputed: {}",
                run.id,
                doc.errors
                    .iter()
                    .map(|p| format!("{} {}", p.pointer, p.detail))
                    .collect::<Vec<_>>()
                    .join("; ")
            ))
        })?;
    let check_run = match state.store.submit(&new).await.map_err(ApiError::internal)? {
        Submitted::Created(r) => r,
        other => {
            return Err(ApiError::internal(std::io::Error::other(format!(
                "a check run was not created: {other:?}"
            ))))
        }
    };
    state.wake.notify_waiters();
    tracing::info!(run_id = %run.id, check_run_id = %check_run.id, "re-verification queued");
    let record = state
        .store
        .verification(&check_run.id)
        .await
        .map_err(ApiError::internal)?
        .ok_or_else(|| ApiError::internal(std::io::Error::other("the verification vanished")))?;
    Ok(HttpResponse::Accepted()
        .insert_header((
            header::LOCATION,
            format!("/v1/verifications/{}", check_run.id),
        ))
        .insert_header((header::RETRY_AFTER, "1"))
        .json(record))
}

/// `GET /v1/runs/{id}/verifications`: every verification of the run, oldest first.
pub async fn of_run(
    state: web::Data<AppState>,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let run = find(&state, &id).await?;
    let list = state
        .store
        .verifications(&run.id)
        .await
        .map_err(ApiError::internal)?;
    Ok(HttpResponse::Ok().json(serde_json::json!({ "verifications": list })))
}

/// `GET /v1/verifications/{check_run_id}`: one verification.
pub async fn one(
    state: web::Data<AppState>,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let id = parse_id(&id)?;
    let record = state
        .store
        .verification(&id)
        .await
        .map_err(ApiError::internal)?
        .ok_or_else(|| ApiError::NotFound(format!("no verification has the id `{id}`")))?;
    Ok(HttpResponse::Ok().json(record))
}
