//! Handlers of `/v1/audit`: a page of the hash-chained log, and the check of the whole chain.

use super::error::ApiError;
use super::AppState;
use actix_web::{web, HttpResponse};
use serde_json::json;

/// Entries per page when `limit` is not given.
const DEFAULT_AUDIT_PAGE: u32 = 100;
/// Largest `limit`.
const MAX_AUDIT_PAGE: u32 = 1_000;

/// `GET /v1/audit?after=SEQ&limit=N`: entries after position `after` (0: from the start), in
/// order, with the cursor of the next page and the current head.
pub async fn page(
    state: web::Data<AppState>,
    query: web::Query<Vec<(String, String)>>,
) -> Result<HttpResponse, ApiError> {
    let mut after = 0u64;
    let mut limit = DEFAULT_AUDIT_PAGE;
    for (k, v) in query.into_inner() {
        match k.as_str() {
            "after" => {
                // Positions are SQLite integers: at most 2^63 - 1 (as openapi.yaml says).
                after = v
                    .parse::<u64>()
                    .ok()
                    .filter(|n| i64::try_from(*n).is_ok())
                    .ok_or_else(|| {
                        ApiError::BadRequest(format!(
                            "`after` must be an entry position from 0 to {}, not {v:?}",
                            i64::MAX
                        ))
                    })?
            }
            "limit" => {
                limit = v
                    .parse()
                    .ok()
                    .filter(|n| (1..=MAX_AUDIT_PAGE).contains(n))
                    .ok_or_else(|| {
                        ApiError::BadRequest(format!(
                            "`limit` must be an integer from 1 to {MAX_AUDIT_PAGE}, not {v:?}"
                        ))
                    })?
            }
            other => {
                return Err(ApiError::BadRequest(format!(
                    "unknown query parameter `{other}`"
                )))
            }
        }
    }
    let entries = state
        .store
        .audit_page(after, limit)
        .await
        .map_err(ApiError::internal)?;
    let next_after = (entries.len() == limit as usize)
        .then(|| entries.last().map(|e| e.seq))
        .flatten();
    Ok(HttpResponse::Ok().json(json!({
        "entries": entries,
        "next_after": next_after,
    })))
}

/// `GET /v1/audit/verify`: recomputes the chain and checks every entry against the records
/// as they are now; names the first entry that does not hold.
pub async fn verify(state: web::Data<AppState>) -> Result<HttpResponse, ApiError> {
    let verdict = state
        .store
        .verify_audit()
        .await
        .map_err(ApiError::internal)?;
    Ok(HttpResponse::Ok().json(verdict))
}
