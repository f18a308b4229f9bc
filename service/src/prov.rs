//! W3C PROV-JSON export of a succeeded run (W3C Member Submission "PROV-JSON Serialization",
//! 2013; the PROV data model is W3C PROV-DM, 2013). Pure: builds the document from a stored
//! run.
//!
//! What the document says: the run (activity) used the spec and the matrix (entities), was
//! associated with the service at its version (software agent), and generated the result
//! (entity), which was derived from both inputs and attributed to the agent. A run answered
//! by reuse generated no new computation: its result entity is the earlier run's result,
//! and the document says it was derived from that run's activity. Entities are named by the
//! SHA-256 hashes an auditor can recompute (README: "Reproducing a matrix hash", the RFC 8785
//! spec hash, and the SHA-256 of the stored results text, the same one the audit log's
//! `finished` entry vouches for).

use crate::db::RunRecord;
use crate::provenance::sha256_hex;
use serde_json::{json, Map, Value};

/// Namespace of demefix's own identifiers and attributes.
pub const NAMESPACE: &str = "https://demefix.invalid/ns/prov#";

/// Why a run has no PROV document.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ProvError {
    /// Only succeeded runs carry provenance.
    #[error("run {0} has not succeeded; provenance is recorded with the results")]
    NotSucceeded(String),
    /// The stored provenance is not the object the schema promises.
    #[error("the stored provenance of run {0} is unreadable")]
    Unreadable(String),
}

fn text(p: &Map<String, Value>, key: &str) -> Value {
    p.get(key).cloned().unwrap_or(Value::Null)
}

/// The PROV-JSON document of `run`.
pub fn document(run: &RunRecord) -> Result<Value, ProvError> {
    let (Some(provenance), Some(results)) = (&run.provenance, &run.results) else {
        return Err(ProvError::NotSucceeded(run.id.clone()));
    };
    let p: Map<String, Value> =
        serde_json::from_str(provenance).map_err(|_| ProvError::Unreadable(run.id.clone()))?;
    let str_of = |key: &str| p.get(key).and_then(Value::as_str).unwrap_or_default();
    let spec = format!("demefix:spec-{}", str_of("spec_sha256"));
    let matrix = format!("demefix:matrix-{}", str_of("matrix_sha256"));
    let results_sha256 = sha256_hex(results.as_bytes());
    let result = format!("demefix:result-{results_sha256}");
    let activity = format!("demefix:run-{}", run.id);
    let agent = format!("demefix:service-{}", str_of("service_version"));
    let started = run
        .started_at
        .clone()
        .unwrap_or_else(|| run.submitted_at.clone());
    let ended = run.finished_at.clone().map_or(Value::Null, Value::String);

    let mut entity = Map::new();
    entity.insert(
        spec.clone(),
        json!({
            "prov:type": "demefix:JobSpec",
            "prov:label": "the job as accepted, defaults filled in",
            "demefix:spec_sha256": text(&p, "spec_sha256"),
            "demefix:request_sha256": text(&p, "request_sha256"),
            "demefix:seed": text(&p, "seed"),
        }),
    );
    entity.insert(
        matrix.clone(),
        json!({
            "prov:type": "demefix:MigrationMatrix",
            "prov:label": "the migration matrix as sent",
            "demefix:matrix_sha256": text(&p, "matrix_sha256"),
            "demefix:normalised_matrix_sha256": text(&p, "normalised_matrix_sha256"),
        }),
    );
    entity.insert(
        result.clone(),
        json!({
            "prov:type": "demefix:Result",
            "prov:label": "model estimates for planning, not forecasts",
            "demefix:results_sha256": results_sha256,
            "demefix:method": text(&p, "method"),
            "demefix:method_version": text(&p, "method_version"),
        }),
    );
    let mut activity_attrs = json!({
        "prov:type": "demefix:Run",
        "prov:startTime": started,
        "prov:endTime": ended,
        "demefix:status": run.status.as_str(),
        "demefix:rng": text(&p, "rng"),
        "demefix:host": text(&p, "host"),
        "demefix:threads": text(&p, "threads"),
    });
    if let Some(series) = &run.series {
        activity_attrs["demefix:series"] = json!(series);
    }
    let mut doc = json!({
        "prefix": {
            "demefix": NAMESPACE,
            "xsd": "http://www.w3.org/2001/XMLSchema#",
        },
        "entity": Value::Object(entity),
        "activity": { activity.clone(): activity_attrs },
        "agent": {
            agent.clone(): {
                "prov:type": {"$": "prov:SoftwareAgent", "type": "xsd:QName"},
                "prov:label": "demefix service",
                "demefix:service_version": text(&p, "service_version"),
            }
        },
        "used": {
            "_:used-spec": {"prov:activity": activity, "prov:entity": spec},
            "_:used-matrix": {"prov:activity": activity, "prov:entity": matrix},
        },
        "wasGeneratedBy": {
            "_:generated-result": {
                "prov:entity": result, "prov:activity": activity, "prov:time": ended,
            }
        },
        "wasAssociatedWith": {
            "_:associated": {"prov:activity": activity, "prov:agent": agent}
        },
        "wasAttributedTo": {
            "_:attributed": {"prov:entity": result, "prov:agent": agent}
        },
        "wasDerivedFrom": {
            "_:from-spec": {"prov:generatedEntity": result, "prov:usedEntity": spec},
            "_:from-matrix": {"prov:generatedEntity": result, "prov:usedEntity": matrix},
        },
    });
    if let Some(earlier) = &run.reused_from {
        let earlier_activity = format!("demefix:run-{earlier}");
        doc["activity"][&earlier_activity] = json!({
            "prov:type": "demefix:Run",
            "prov:label": "the run whose results were reused",
        });
        doc["wasInformedBy"] = json!({
            "_:reused": {
                "prov:informed": activity,
                "prov:informant": earlier_activity,
                "demefix:reused_from": earlier,
            }
        });
    }
    Ok(doc)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::domain::RunStatus;

    fn run(reused_from: Option<&str>) -> RunRecord {
        RunRecord {
            id: "r1".into(),
            status: RunStatus::Succeeded,
            series: Some("nightly".into()),
            spec: "{}".into(),
            provenance: Some(
                json!({"spec_sha256": "aa", "matrix_sha256": "bb", "service_version": "0.1.0+abc",
                       "method": "exact", "method_version": "0.3.0", "request_sha256": "cc"})
                .to_string(),
            ),
            results: Some("[]".into()),
            warnings: vec![],
            error: None,
            done: 1,
            total: 1,
            submitted_at: "2026-12-01T00:00:00.000Z".into(),
            started_at: Some("2026-12-01T00:00:01.000Z".into()),
            finished_at: Some("2026-12-01T00:00:02.000Z".into()),
            reused_from: reused_from.map(str::to_owned),
            sensitivity: None,
            whatif: None,
            notify_url: None,
            notification: None,
        }
    }

    #[test]
    fn the_run_used_spec_and_matrix_and_generated_the_result() {
        let doc = document(&run(None)).unwrap();
        let result = format!("demefix:result-{}", sha256_hex(b"[]"));
        assert!(doc["entity"]["demefix:spec-aa"].is_object());
        assert!(doc["entity"]["demefix:matrix-bb"].is_object());
        assert!(doc["entity"][&result].is_object());
        assert_eq!(
            doc["wasGeneratedBy"]["_:generated-result"]["prov:activity"],
            "demefix:run-r1"
        );
        assert_eq!(
            doc["wasAssociatedWith"]["_:associated"]["prov:agent"],
            "demefix:service-0.1.0+abc"
        );
        assert!(doc.get("wasInformedBy").is_none());
        let reused = document(&run(Some("r0"))).unwrap();
        assert_eq!(
            reused["wasInformedBy"]["_:reused"]["prov:informant"],
            "demefix:run-r0"
        );
    }

    #[test]
    fn an_unfinished_run_has_no_document() {
        let mut r = run(None);
        r.results = None;
        assert_eq!(document(&r), Err(ProvError::NotSucceeded("r1".into())));
    }
}
