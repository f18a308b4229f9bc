//! Screening approximations through the service: approximation runs with their regimes and
//! link rows, exact runs with discrepancies, and 422 pointers for bad `method.approximations`.

use super::helpers::{error_pointers, small_job, spawn_app};
use serde_json::{json, Value};
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn approximation_and_exact_runs_report_regimes_discrepancies_and_warnings() {
    let app = spawn_app().await;
    let mut job = small_job();
    job["selection"]["s"] = json!([0.001, 0.3]);
    job["method"] = json!({"kind": "approximation"});
    job["outputs"] = json!({"sensitivity": true});
    let approx = app.succeeded(&job, FINISH).await;
    assert_eq!(
        approx["provenance"]["method"],
        "approximation:weak_selection"
    );
    for r in approx["results"].as_array().unwrap() {
        assert_eq!(r["method"], "approximation:weak_selection");
        assert_eq!(r["valid_regime"]["approximation"], "weak_selection");
        assert_eq!(r["approximations"].as_array().unwrap().len(), 3);
    }
    let rows = approx["sensitivity"].as_array().unwrap();
    assert_eq!(rows.len(), 2 * 2 * 6, "2 values of s x 2 starts x 6 links");
    assert!(rows
        .iter()
        .all(|r| r["method"] == "approximation:weak_selection"));
    let warnings = approx["warnings"].as_array().unwrap();
    assert!(
        warnings.iter().any(|w| w
            .as_str()
            .unwrap()
            .contains("no screening approximation is inside")),
        "{warnings:?}"
    );

    job["method"] = json!({"kind": "exact"});
    let exact = app.succeeded(&job, FINISH).await;
    for r in exact["results"].as_array().unwrap() {
        let rho = r["fixation_probability"].as_f64().unwrap();
        for e in r["approximations"].as_array().unwrap() {
            let d = e["discrepancy"].as_f64().unwrap();
            assert_eq!(d, e["fixation_probability"].as_f64().unwrap() - rho);
        }
    }
    // An exact job shows approximations outside their regime (all three at s = 0.3) only
    // with a warning naming each.
    let warnings: Vec<&str> = exact["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap())
        .collect();
    for name in ["weak_selection", "strong_migration", "branching"] {
        assert!(
            warnings
                .iter()
                .any(|w| w.contains(&format!("`{name}` is outside its valid regime"))),
            "{name}: {warnings:?}"
        );
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_approximation_names_are_422_problems_at_their_pointers() {
    let app = spawn_app().await;
    let mut job = small_job();
    job["method"]["approximations"] = json!(["weak_selection", "saddlepoint", "weak_selection"]);
    let res = app.post_job(&job).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    let pointers = error_pointers(&doc);
    assert_eq!(
        pointers,
        ["/method/approximations/1", "/method/approximations/2"],
        "{doc:#}"
    );
    job["method"] = json!({"kind": "approximation", "approximations": []});
    let res = app.post_job(&job).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["errors"][0]["pointer"], "/method/approximations");
    assert_eq!(app.stored_runs().await, 0, "a rejected job stores nothing");
    app.stop().await;
}
