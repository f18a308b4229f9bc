//! Nightly series through the service: runs carry `series` and `as_of`, are listed by date,
//! and two nights are compared start by start with intervals, flags and the matrix entries
//! that changed most.

use super::helpers::{error_pointers, spawn_app};
use serde_json::{json, Value};
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);

fn night(as_of: &str, link: f64, method: Value) -> Value {
    json!({
        "series": "harbour-nights",
        "as_of": as_of,
        "population": {"demes": [{"id": "quay", "size": 4}, {"id": "hill", "size": 3}, {"id": "mill", "size": 3}]},
        "migration": {"orientation": "flows", "matrix": [[0, link, 1], [2, 0, 1], [1, 1, 0]]},
        "dynamics": {"rule": "birth_death"},
        "selection": {"s": [0.2]},
        "start": ["quay", "hill", "uniform"],
        "method": method
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_nights_are_compared_start_by_start() {
    let app = spawn_app().await;
    let exact = json!({"kind": "exact"});
    let first = app
        .succeeded(&night("2026-11-30", 1.0, exact.clone()), FINISH)
        .await;
    let second = app
        .succeeded(&night("2026-12-01", 6.0, exact), FINISH)
        .await;

    let all = app.get_json("/v1/series").await;
    let listed = &all["series"][0];
    assert_eq!(listed["name"], "harbour-nights");
    assert_eq!(listed["runs"], 2);
    assert_eq!(listed["first_as_of"], "2026-11-30");
    assert_eq!(listed["last_as_of"], "2026-12-01");
    let runs = app.get_json("/v1/series/harbour-nights").await;
    assert_eq!(runs["runs"][0]["id"], first["id"]);
    assert_eq!(runs["runs"][1]["as_of"], "2026-12-01");

    let report = app
        .get_json("/v1/series/harbour-nights/changes?threshold=0.5")
        .await;
    assert_eq!(report["from"]["run_id"], first["id"]);
    assert_eq!(report["to"]["as_of"], "2026-12-01");
    let rows = report["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 3);
    for (row, (a, b)) in rows.iter().zip(
        first["results"]
            .as_array()
            .unwrap()
            .iter()
            .zip(second["results"].as_array().unwrap()),
    ) {
        assert_eq!(row["start"], a["start"]);
        let fp = &row["fixation_probability"];
        let expected = b["fixation_probability"].as_f64().unwrap()
            - a["fixation_probability"].as_f64().unwrap();
        assert_eq!(fp["change"].as_f64().unwrap(), expected, "{row:#}");
        assert_eq!(
            fp["ci95"][0], fp["ci95"][1],
            "exact against exact: no interval"
        );
        assert_eq!(fp["above_threshold"], false);
        assert_eq!(fp["flagged"], fp["distinguishable"]);
    }
    let changed = &report["matrix_changes"];
    assert_eq!(changed["entries_changed"], 1);
    assert_eq!(changed["entries"][0]["source"], "quay");
    assert_eq!(changed["entries"][0]["target"], "hill");
    assert_eq!(changed["entries"][0]["change"], 5.0);
    assert!(report["caution"]
        .as_str()
        .unwrap()
        .contains("not forecasts"));

    // By date, the other way round; the same run twice is refused.
    let back = app
        .get_json("/v1/series/harbour-nights/changes?from=2026-12-01&to=2026-11-30")
        .await;
    assert_eq!(back["from"]["run_id"], second["id"]);
    let same = app
        .get("/v1/series/harbour-nights/changes?from=2026-12-01&to=2026-12-01")
        .await;
    assert_eq!(same.status(), 409);
    assert_eq!(app.get("/v1/series/no-such-series").await.status(), 404);
    let bad = app
        .get("/v1/series/harbour-nights/changes?threshold=-1")
        .await;
    assert_eq!(bad.status(), 400);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn ensemble_nights_get_a_difference_interval_that_accounts_for_both() {
    let app = spawn_app().await;
    let method = json!({"kind": "ensemble", "replicates": 4000, "seed": 5});
    app.succeeded(&night("2026-11-30", 1.0, method.clone()), FINISH)
        .await;
    app.succeeded(
        &night(
            "2026-12-01",
            1.0,
            json!({"kind": "ensemble", "replicates": 4000, "seed": 6}),
        ),
        FINISH,
    )
    .await;
    let report = app.get_json("/v1/series/harbour-nights/changes").await;
    for row in report["rows"].as_array().unwrap() {
        let fp = &row["fixation_probability"];
        let (lo, hi) = (
            fp["ci95"][0].as_f64().unwrap(),
            fp["ci95"][1].as_f64().unwrap(),
        );
        let change = fp["change"].as_f64().unwrap();
        assert!(lo < change && change < hi, "{fp:#}");
        assert!(
            hi - lo > 0.01,
            "two ensembles of 4,000: a real interval {fp:#}"
        );
        assert!(fp["interval"].as_str().unwrap().contains("Newcombe"));
        let t = &row["mean_fixation_generations"];
        assert!(
            t["ci95"][0].as_f64().unwrap() < t["ci95"][1].as_f64().unwrap(),
            "{t:#}"
        );
    }
    assert_eq!(report["matrix_changes"]["entries_changed"], 0);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_bad_or_orphan_as_of_is_rejected_with_its_pointer() {
    let app = spawn_app().await;
    let mut bad = night("2026-02-30", 1.0, json!({"kind": "exact"}));
    let res = app.post_job(&bad).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    assert_eq!(error_pointers(&doc), ["/as_of"]);
    bad["as_of"] = json!("2026-12-01");
    bad.as_object_mut().unwrap().remove("series");
    let res = app.post_job(&bad).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    assert_eq!(error_pointers(&doc), ["/as_of"]);
    assert_eq!(app.stored_runs().await, 0);
    app.stop().await;
}
