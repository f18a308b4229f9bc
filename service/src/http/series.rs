//! Handlers of `/v1/series`: the series, the runs of one by date, and the change report
//! between two of its runs ([`crate::changes`]).

use super::error::ApiError;
use super::AppState;
use crate::changes::{self, Night, Side, Thresholds};
use crate::domain::{RunStatus, RunSummary};
use actix_web::{web, HttpResponse};
use serde_json::{json, Value};

/// `GET /v1/series`.
pub async fn list(state: web::Data<AppState>) -> Result<HttpResponse, ApiError> {
    let series = state.store.series().await.map_err(ApiError::internal)?;
    Ok(HttpResponse::Ok().json(json!({ "series": series })))
}

async fn runs_of(state: &AppState, name: &str) -> Result<Vec<crate::db::SeriesRun>, ApiError> {
    let runs = state
        .store
        .series_runs(name)
        .await
        .map_err(ApiError::internal)?;
    if runs.is_empty() {
        return Err(ApiError::NotFound(format!(
            "no run belongs to series `{name}`"
        )));
    }
    Ok(runs)
}

/// `GET /v1/series/{name}`: its runs by date, then submission.
pub async fn one(
    state: web::Data<AppState>,
    name: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    let runs = runs_of(&state, &name).await?;
    let rows: Vec<Value> = runs
        .iter()
        .map(|r| {
            let mut v = serde_json::to_value(RunSummary::from(&r.run)).unwrap_or_default();
            v["as_of"] = json!(r.as_of);
            v
        })
        .collect();
    Ok(HttpResponse::Ok().json(json!({ "name": name.as_str(), "runs": rows })))
}

fn threshold(v: &str, name: &str) -> Result<f64, ApiError> {
    v.parse::<f64>()
        .ok()
        .filter(|t| t.is_finite() && *t >= 0.0)
        .ok_or_else(|| ApiError::BadRequest(format!("`{name}` must be a number >= 0, not {v:?}")))
}

/// `GET /v1/series/{name}/changes?from=&to=&threshold=&generations_threshold=`.
pub async fn changes(
    state: web::Data<AppState>,
    name: web::Path<String>,
    query: web::Query<Vec<(String, String)>>,
) -> Result<HttpResponse, ApiError> {
    let (mut from, mut to) = (None, None);
    let mut thresholds = Thresholds::default();
    for (k, v) in query.into_inner() {
        match k.as_str() {
            "from" => from = Some(v),
            "to" => to = Some(v),
            "threshold" => thresholds.fixation_probability = Some(threshold(&v, &k)?),
            "generations_threshold" => thresholds.generations = Some(threshold(&v, &k)?),
            other => {
                return Err(ApiError::BadRequest(format!(
                    "unknown query parameter `{other}`"
                )))
            }
        }
    }
    let report = change_report(&state, &name, from.as_deref(), to.as_deref(), thresholds).await?;
    Ok(HttpResponse::Ok().json(report))
}

/// The change report of series `name` between the runs `from` and `to` name
/// ([`changes::choose`]); `409` when they cannot be compared.
pub(super) async fn change_report(
    state: &AppState,
    name: &str,
    from: Option<&str>,
    to: Option<&str>,
    thresholds: Thresholds,
) -> Result<Value, ApiError> {
    let runs = runs_of(state, name).await?;
    let nights: Vec<Night<'_>> = runs
        .iter()
        .map(|r| Night {
            run_id: &r.run.id,
            as_of: r.as_of.as_deref(),
            succeeded: r.run.status == RunStatus::Succeeded,
        })
        .collect();
    let (a, b) = changes::choose(&nights, from, to).map_err(ApiError::Conflict)?;
    let parse = |text: Option<&str>| -> Value {
        text.and_then(|t| serde_json::from_str(t).ok())
            .unwrap_or(Value::Null)
    };
    let (spec_a, res_a) = (
        parse(Some(&runs[a].run.spec)),
        parse(runs[a].run.results.as_deref()),
    );
    let (spec_b, res_b) = (
        parse(Some(&runs[b].run.spec)),
        parse(runs[b].run.results.as_deref()),
    );
    Ok(changes::report(
        name,
        &Side {
            run_id: &runs[a].run.id,
            as_of: runs[a].as_of.as_deref(),
            spec: &spec_a,
            results: &res_a,
        },
        &Side {
            run_id: &runs[b].run.id,
            as_of: runs[b].as_of.as_deref(),
            spec: &spec_b,
            results: &res_b,
        },
        thresholds,
    ))
}
