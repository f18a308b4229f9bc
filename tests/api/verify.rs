//! Re-verification through the service: a succeeded run is recomputed from its stored spec
//! (recorded seed and method) by a check run, and the verification says whether the canonical
//! result document is byte-identical, is listed with the run, and is itself in the audit log.

use super::helpers::{ensemble_job, spawn_app, TestApp};
use serde_json::Value;
use std::time::{Duration, Instant};

const FINISH: Duration = Duration::from_secs(60);

async fn wait_verified(app: &TestApp, path: &str) -> Value {
    let start = Instant::now();
    loop {
        let v = app.get_json(path).await;
        if v["status"] != "pending" {
            return v;
        }
        assert!(
            start.elapsed() < FINISH,
            "verification still pending: {v:#}"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_recomputed_ensemble_with_a_picked_seed_is_byte_identical_and_recorded() {
    let app = spawn_app().await;
    let mut job = ensemble_job(900, 300);
    job["method"].as_object_mut().unwrap().remove("seed");
    job["outputs"] = serde_json::json!({"sensitivity": true});
    let run = app.succeeded(&job, FINISH).await;
    let id = run["id"].as_str().unwrap().to_owned();

    let res = app
        .client
        .post(app.url(&format!("/v1/runs/{id}/verify")))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 202);
    let location = res.headers()["location"].to_str().unwrap().to_owned();
    let pending: Value = res.json().await.unwrap();
    assert_eq!(pending["run_id"], id.as_str());
    let check = pending["check_run_id"].as_str().unwrap().to_owned();
    assert_eq!(location, format!("/v1/verifications/{check}"));

    let done = wait_verified(&app, &location).await;
    assert_eq!(done["status"], "identical", "{done:#}");
    assert_eq!(done["byte_identical"], true);
    assert_eq!(
        done["original_result_sha256"],
        done["recomputed_result_sha256"]
    );
    assert_eq!(done["differences"], serde_json::json!([]));
    assert_eq!(done["method_version"]["moved_on"], false);
    assert_eq!(
        done["method_version"]["recorded"],
        run["provenance"]["method_version"]
    );

    // The check run is a run of its own, computed, never reused, in no series.
    let check_run = app.get_json(&format!("/v1/runs/{check}")).await;
    assert_eq!(check_run["status"], "succeeded", "{check_run:#}");
    assert!(check_run["reused_from"].is_null());
    assert_eq!(check_run["results"], run["results"]);

    let listed = app.get_json(&format!("/v1/runs/{id}/verifications")).await;
    assert_eq!(listed["verifications"][0], done);

    let audit = app.get_json("/v1/audit?limit=1000").await;
    let verified: Vec<&Value> = audit["entries"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|e| e["kind"] == "verified")
        .collect();
    assert_eq!(verified.len(), 1);
    assert_eq!(verified[0]["run_id"], id.as_str());
    let verdict = app.get_json("/v1/audit/verify").await;
    assert_eq!(verdict["intact"], true, "{verdict:#}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn only_succeeded_runs_can_be_verified() {
    let app = spawn_app().await;
    let queued = app.post_job(&ensemble_job(5_000_000, 1000)).await;
    let queued: Value = queued.json().await.unwrap();
    let id = queued["id"].as_str().unwrap();
    let post = |path: String| app.client.post(app.url(&path)).send();
    let early = post(format!("/v1/runs/{id}/verify")).await.unwrap();
    assert_eq!(early.status(), 409);
    let problem: Value = early.json().await.unwrap();
    assert!(problem["detail"].as_str().unwrap().contains("succeeded"));
    let unknown = post("/v1/runs/01890000-0000-7000-8000-000000000000/verify".into())
        .await
        .unwrap();
    assert_eq!(unknown.status(), 404);
    let none = app
        .get("/v1/verifications/01890000-0000-7000-8000-000000000000")
        .await;
    assert_eq!(none.status(), 404);
    app.stop().await;
}
