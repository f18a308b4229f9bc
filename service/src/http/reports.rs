//! Handler of `GET /v1/runs/{id}/report`: the run's self-contained HTML report
//! ([`crate::report`]), rendered on a blocking thread, with a strong `ETag`.
//!
//! Only finished runs have a report: a queued or running run is a 409 problem document with
//! `Retry-After` (the page would change under the client, and a strong tag would be a lie); a
//! failed or cancelled run gets a page that says so. The page loads nothing from anywhere, and
//! the `Content-Security-Policy` header says so to the browser as well. A succeeded run of a
//! series carries the change report against the series' run before it.

use super::error::ApiError;
use super::runs::{document, etag_matches, find, strong_etag};
use super::AppState;
use actix_web::http::header;
use actix_web::{web, HttpRequest, HttpResponse};

/// What the page may load: nothing but its own inline style (and a `data:` icon, so the
/// browser does not ask for `/favicon.ico`).
const CONTENT_SECURITY_POLICY: &str =
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:";

/// `GET /v1/runs/{id}/report`.
pub async fn get(
    state: web::Data<AppState>,
    req: HttpRequest,
    id: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let run = find(&state, &id).await?;
    if !run.status.is_finished() {
        return Err(ApiError::NotFinished {
            run_id: run.id,
            status: run.status.as_str(),
        });
    }
    let bytes = document(&run)?;
    // A succeeded run of a series also shows what changed since the series' run before it
    // (none for its first night).
    let changes = match (&run.series, run.status) {
        (Some(series), crate::domain::RunStatus::Succeeded) => super::series::change_report(
            &state,
            series,
            None,
            Some(&run.id),
            crate::changes::Thresholds::default(),
        )
        .await
        .ok(),
        _ => None,
    };
    let page = web::block(move || {
        serde_json::from_slice::<serde_json::Value>(&bytes)
            .map(|doc| crate::report::render(&doc, changes.as_ref()))
    })
    .await
    .map_err(ApiError::internal)?
    .map_err(ApiError::internal)?;
    let etag = strong_etag(page.as_bytes());
    if etag_matches(&req, &etag) {
        return Ok(HttpResponse::NotModified()
            .insert_header((header::ETAG, etag))
            .finish());
    }
    Ok(HttpResponse::Ok()
        .content_type("text/html; charset=utf-8")
        .insert_header((header::ETAG, etag))
        .insert_header((header::CONTENT_SECURITY_POLICY, CONTENT_SECURITY_POLICY))
        .insert_header((header::X_CONTENT_TYPE_OPTIONS, "nosniff"))
        .body(page))
}
