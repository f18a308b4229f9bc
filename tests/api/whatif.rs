//! What-if scenarios and plans through the service: stored and served as the run document's
//! `interventions` and `plan`, reused byte for byte, and 422 pointers for bad members.

use super::helpers::{ensemble_job, error_pointers, small_job, spawn_app};
use serde_json::{json, Value};
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn interventions_and_plans_are_stored_served_and_reused() {
    let app = spawn_app().await;
    let mut job = small_job();
    job["interventions"] = json!([
        {"name": "isolate-a", "changes": [{"action": "scale_out_of", "deme": "a", "factor": 0}]}
    ]);
    job["plan"] = json!({"budget": 0.2, "steps": 2});
    let done = app.succeeded(&job, FINISH).await;
    let rows = done["interventions"]
        .as_array()
        .expect("interventions served");
    assert_eq!(rows.len(), 2, "one scenario x 2 starts");
    let isolated = rows.iter().find(|r| r["start"] == "a").unwrap();
    assert_eq!(isolated["scenario_fixation_probability"], 0.0);
    assert_eq!(isolated["method"], "exact");
    let plan = &done["plan"];
    assert_eq!(plan["budget"], 0.2);
    assert!(plan["steps"].as_array().unwrap().len() <= 2);
    for step in plan["steps"].as_array().unwrap() {
        assert!(step["budget_used"].as_f64().unwrap() <= 0.2);
    }
    // The same spec again is answered by reuse, what-ifs included, byte for byte.
    let again: Value = app.post_job(&job).await.json().await.unwrap();
    assert!(again["reused_from"].is_string(), "{again:#}");
    let again = app
        .wait_finished(again["id"].as_str().unwrap(), FINISH)
        .await;
    assert_eq!(
        again["interventions"].to_string(),
        done["interventions"].to_string()
    );
    assert_eq!(again["plan"].to_string(), done["plan"].to_string());
    // Without them, neither member.
    let plain = app.succeeded(&small_job(), FINISH).await;
    assert!(plain.get("interventions").is_none() && plain.get("plan").is_none());
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_ensemble_what_if_that_changes_nothing_gives_exactly_zero_change() {
    let app = spawn_app().await;
    let mut job = ensemble_job(600, 200);
    job["interventions"] = json!([
        {"name": "same", "changes": [{"action": "scale_link", "from": "x", "to": "y", "factor": 1}]}
    ]);
    let done = app.succeeded(&job, FINISH).await;
    for r in done["interventions"].as_array().unwrap() {
        assert_eq!(r["method"], "ensemble");
        assert_eq!(r["change_fixation_probability"], 0.0);
        let result = done["results"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["s"] == r["s"] && x["start"] == r["start"])
            .unwrap();
        assert_eq!(
            r["baseline_fixation_probability"],
            result["fixation_probability"]
        );
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_interventions_and_plans_are_422_with_every_pointer_and_store_nothing() {
    let app = spawn_app().await;
    let before = app.stored_runs().await;
    let mut job = small_job();
    job["interventions"] = json!([
        {"name": "x", "changes": [
            {"action": "close_link", "from": "a", "to": "ghost"},
            {"action": "scale_into", "deme": "c", "factor": -2}]},
        {"name": "x", "changes": [{"action": "scale_link", "from": "b", "to": "c", "factor": 1}]}
    ]);
    job["plan"] = json!({"budget": 2, "shortlist": 0});
    let res = app.post_raw(job.to_string().into_bytes(), None).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    let pointers = error_pointers(&doc);
    for want in [
        "/interventions/0/changes/0/to",
        "/interventions/0/changes/1/factor",
        "/interventions/1/name",
        "/plan/budget",
        "/plan/shortlist",
    ] {
        assert!(pointers.contains(&want), "{want} missing from {pointers:?}");
    }
    // A link that exists in no matrix entry: flows a -> c are 0 in this job's matrix.
    let mut job = small_job();
    job["migration"]["matrix"] = json!([[0, 4, 0], [3, 0, 2], [1, 1, 0]]);
    job["interventions"] = json!([
        {"name": "y", "changes": [{"action": "close_link", "from": "a", "to": "c"}]}
    ]);
    let res = app.post_raw(job.to_string().into_bytes(), None).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["errors"][0]["pointer"], "/interventions/0/changes/0");
    assert_eq!(app.stored_runs().await, before);
    app.stop().await;
}
