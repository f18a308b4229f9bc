//! Handlers of `/v1/matrices`: store a matrix once under its canonical hash, fetch it back.
//!
//! `POST` reads `application/json` (`{"matrix": [[...]]}`, also when no `Content-Type` is
//! sent) or `text/csv` (the format of `migration.matrix_csv`), answers `201` for a new
//! matrix and `200` for one stored before, with `Location: /v1/matrices/{sha256}`. A stored
//! matrix never changes, so `GET` serves a strong `ETag` (the hash itself) and answers `304`
//! to a matching `If-None-Match`.

use super::error::ApiError;
use super::runs::read_body;
use super::AppState;
use crate::db::{MatrixRecord, MatrixStored};
use crate::domain::{self, MatrixFormat, MatrixView};
use crate::spec;
use actix_web::http::{header, StatusCode};
use actix_web::{web, HttpRequest, HttpResponse};

/// How long a client may cache a stored matrix: it never changes (one year, the common
/// practice for immutable resources).
const IMMUTABLE: &str = "public, max-age=31536000, immutable";

/// The format of the body, from its `Content-Type` (JSON when none is sent).
fn format_of(req: &HttpRequest) -> Result<MatrixFormat, ApiError> {
    let Some(value) = req.headers().get(header::CONTENT_TYPE) else {
        return Ok(MatrixFormat::Json);
    };
    let media = value
        .to_str()
        .unwrap_or_default()
        .split(';')
        .next()
        .unwrap_or_default()
        .trim()
        .to_ascii_lowercase();
    match media.as_str() {
        "application/json" => Ok(MatrixFormat::Json),
        m if m.starts_with("application/") && m.ends_with("+json") => Ok(MatrixFormat::Json),
        "text/csv" => Ok(MatrixFormat::Csv),
        _ => Err(ApiError::UnsupportedMediaType(format!(
            "a matrix is sent as application/json or text/csv, not `{media}`"
        ))),
    }
}

fn location(record: &MatrixRecord) -> String {
    format!("/v1/matrices/{}", record.sha256)
}

fn document(record: &MatrixRecord, with_entries: bool) -> Result<Vec<u8>, ApiError> {
    let view = MatrixView::new(record, with_entries).map_err(ApiError::internal)?;
    serde_json::to_vec(&view).map_err(ApiError::internal)
}

/// `POST /v1/matrices`.
pub async fn create(
    state: web::Data<AppState>,
    req: HttpRequest,
    payload: web::Payload,
) -> Result<HttpResponse, ApiError> {
    let format = format_of(&req)?;
    let body = read_body(&req, payload, state.config.body_limit).await?;
    let matrix = web::block(move || domain::prepare_matrix(&body, format))
        .await
        .map_err(|e| ApiError::Internal(format!("validation did not complete: {e}").into()))?
        .map_err(ApiError::InvalidJob)?;
    let stored = state
        .store
        .store_matrix(&matrix)
        .await
        .map_err(ApiError::internal)?;
    let (status, record) = match stored {
        MatrixStored::Created(record) => {
            metrics::counter!("demefix_matrices_stored_total").increment(1);
            tracing::info!(matrix_sha256 = %record.sha256, demes = record.demes, "matrix stored");
            (StatusCode::CREATED, record)
        }
        MatrixStored::Existing(record) => (StatusCode::OK, record),
    };
    Ok(HttpResponse::build(status)
        .insert_header((header::LOCATION, location(&record)))
        .content_type("application/json")
        .body(document(&record, false)?))
}

/// `GET /v1/matrices/{sha256}`: `{sha256}` is the hex hash, or the `sha256:<hex>` of a
/// `matrix_ref`.
pub async fn get(
    state: web::Data<AppState>,
    req: HttpRequest,
    sha256: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let named = sha256.as_str();
    let hex = spec::sha256_of_ref(named)
        .or_else(|| spec::is_sha256_hex(named).then_some(named))
        .ok_or_else(|| {
            ApiError::NotFound(format!(
                "no matrix has the id `{named}`: a matrix is named by its canonical hash, 64 \
                 lowercase hex digits (optionally after `sha256:`)"
            ))
        })?;
    let record = state
        .store
        .matrix(hex)
        .await
        .map_err(ApiError::internal)?
        .ok_or_else(|| ApiError::NotFound(format!("no matrix with the hash {hex} is stored")))?;
    let etag = format!("\"{}\"", record.sha256);
    let matches = req
        .headers()
        .get(header::IF_NONE_MATCH)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.split(',').any(|t| t.trim() == etag || t.trim() == "*"));
    if matches {
        return Ok(HttpResponse::NotModified()
            .insert_header((header::ETAG, etag))
            .insert_header((header::CACHE_CONTROL, IMMUTABLE))
            .finish());
    }
    Ok(HttpResponse::Ok()
        .insert_header((header::ETAG, etag))
        .insert_header((header::CACHE_CONTROL, IMMUTABLE))
        .content_type("application/json")
        .body(document(&record, true)?))
}
