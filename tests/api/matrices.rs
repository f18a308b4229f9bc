//! Stored matrices (`/v1/matrices`), jobs that name one with `matrix_ref`, and runs answered
//! from an earlier run's results (`reused_from`).

use super::helpers::{error_pointers, small_job, spawn_app, TestApp};
use serde_json::{json, Value};
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);

/// The matrix of `small_job`.
fn small_matrix() -> Value {
    small_job()["migration"]["matrix"].clone()
}

/// The canonical hash of `rows`, by the library's one matrix hash.
fn hash_of(rows: &Value) -> String {
    let rows: Vec<Vec<f64>> = serde_json::from_value(rows.clone()).unwrap();
    demefix::provenance::matrix_sha256(rows.len(), rows.iter().flatten().copied())
}

async fn post_matrix(app: &TestApp, content_type: &str, body: Vec<u8>) -> reqwest::Response {
    app.client
        .post(app.url("/v1/matrices"))
        .header("content-type", content_type)
        .body(body)
        .send()
        .await
        .expect("the request is answered")
}

async fn post_json_matrix(app: &TestApp, rows: &Value) -> reqwest::Response {
    let body = json!({ "matrix": rows }).to_string().into_bytes();
    post_matrix(app, "application/json", body).await
}

async fn stored_matrices(app: &TestApp) -> i64 {
    app.running
        .as_ref()
        .expect("running")
        .store
        .count_matrices()
        .await
        .expect("count matrices")
}

/// The pointers of a 422 problem document.
async fn pointers_of(res: reqwest::Response) -> Vec<String> {
    assert_eq!(res.status(), 422);
    assert_eq!(
        res.headers()["content-type"].to_str().unwrap(),
        "application/problem+json"
    );
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["status"], 422);
    error_pointers(&doc)
        .into_iter()
        .map(str::to_owned)
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_matrix_is_stored_once_under_its_canonical_hash_and_served_back() {
    let app = spawn_app().await;
    let rows = small_matrix();
    let hex = hash_of(&rows);

    let res = post_json_matrix(&app, &rows).await;
    assert_eq!(res.status(), 201);
    assert_eq!(
        res.headers()["location"].to_str().unwrap(),
        format!("/v1/matrices/{hex}")
    );
    let first: Value = res.json().await.unwrap();
    assert_eq!(first["sha256"], hex.as_str());
    assert_eq!(first["id"], format!("sha256:{hex}"));
    assert_eq!(first["demes"], 3);
    assert!(first["created_at"].is_string());

    // Again: 200, the same matrix, nothing new stored.
    let res = post_json_matrix(&app, &rows).await;
    assert_eq!(res.status(), 200);
    let again: Value = res.json().await.unwrap();
    assert_eq!(again, first);

    // The same matrix as CSV (header row, -0.0 and spaces) has the same hash.
    let csv = "a,b,c\n0, 4, 1\n3,-0.0,2\n1,1,0\n";
    let res = post_matrix(&app, "text/csv; charset=utf-8", csv.as_bytes().to_vec()).await;
    assert_eq!(res.status(), 200);
    let from_csv: Value = res.json().await.unwrap();
    assert_eq!(from_csv["sha256"], hex.as_str());
    assert_eq!(stored_matrices(&app).await, 1);

    // GET by hex and by reference; a strong ETag answers 304.
    for path in [
        format!("/v1/matrices/{hex}"),
        format!("/v1/matrices/sha256:{hex}"),
    ] {
        let res = app.get(&path).await;
        assert_eq!(res.status(), 200, "{path}");
        let etag = res.headers()["etag"].to_str().unwrap().to_owned();
        assert_eq!(etag, format!("\"{hex}\""));
        let doc: Value = res.json().await.unwrap();
        assert_eq!(doc["sha256"], hex.as_str());
        assert_eq!(doc["created_at"], first["created_at"]);
        assert_eq!(
            doc["matrix"],
            json!([[0.0, 4.0, 1.0], [3.0, 0.0, 2.0], [1.0, 1.0, 0.0]])
        );
        let cached = app
            .client
            .get(app.url(&path))
            .header("If-None-Match", &etag)
            .send()
            .await
            .unwrap();
        assert_eq!(cached.status(), 304);
    }

    // The hash equals the one the inline job's provenance reports.
    let run: Value = app.post_job(&small_job()).await.json().await.unwrap();
    let done = app.wait_finished(run["id"].as_str().unwrap(), FINISH).await;
    assert_eq!(done["provenance"]["matrix_sha256"], hex.as_str());
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unknown_and_malformed_hashes_are_404_problems() {
    let app = spawn_app().await;
    for path in [
        format!("/v1/matrices/{}", "0".repeat(64)),
        format!("/v1/matrices/sha256:{}", "0".repeat(64)),
        "/v1/matrices/not-a-hash".to_owned(),
        format!("/v1/matrices/{}", "A".repeat(64)),
    ] {
        let res = app.get(&path).await;
        assert_eq!(res.status(), 404, "{path}");
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json"
        );
        let doc: Value = res.json().await.unwrap();
        assert_eq!(doc["status"], 404);
        assert!(doc["detail"].is_string());
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_invalid_matrix_is_a_422_with_its_pointers_and_stores_nothing() {
    let app = spawn_app().await;
    let got =
        pointers_of(post_json_matrix(&app, &json!([[0, -1, 1], [1, 0], [1, 1, 0]])).await).await;
    assert_eq!(got, vec!["/matrix/0/1", "/matrix/1"]);
    let got = pointers_of(post_json_matrix(&app, &json!([[0, "x"], [1, 0]])).await).await;
    assert_eq!(got, vec!["/matrix/0/1"]);
    let got = pointers_of(post_json_matrix(&app, &json!([])).await).await;
    assert_eq!(got, vec!["/matrix"]);
    let got =
        pointers_of(post_matrix(&app, "application/json", b"{\"rows\": []}".to_vec()).await).await;
    assert_eq!(got, vec!["/rows", "/matrix"]);
    let got = pointers_of(post_matrix(&app, "application/json", b"[[1]".to_vec()).await).await;
    assert_eq!(got, vec![""]);

    let res = post_matrix(&app, "text/csv", b"0,1\n2,NaN\n".to_vec()).await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["type"], "/problems/invalid-matrix");
    assert_eq!(doc["errors"][0]["pointer"], "");
    let detail = doc["errors"][0]["detail"].as_str().unwrap();
    assert!(detail.starts_with("line 2, field 2"), "{detail}");

    let res = post_matrix(&app, "text/plain", b"0,1\n1,0\n".to_vec()).await;
    assert_eq!(res.status(), 415);
    assert_eq!(
        stored_matrices(&app).await,
        0,
        "a rejected matrix stores nothing"
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_oversize_matrix_is_a_413() {
    let app = super::helpers::spawn_app_with(|raw| raw.body_limit = Some("2048".to_owned())).await;
    let row: Vec<u32> = vec![1; 40];
    let rows = json!(vec![row; 40]);
    let res = post_json_matrix(&app, &rows).await;
    assert_eq!(res.status(), 413);
    assert_eq!(stored_matrices(&app).await, 0);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_job_with_matrix_ref_runs_like_the_same_job_with_the_matrix_inline() {
    let app = spawn_app().await;
    let stored: Value = post_json_matrix(&app, &small_matrix())
        .await
        .json()
        .await
        .unwrap();
    let inline = small_job();
    let mut by_ref = small_job();
    by_ref["migration"] = json!({"orientation": "flows", "matrix_ref": stored["id"]});

    // The reference first: it is computed (no inline run exists yet).
    let res = app.post_job(&by_ref).await;
    assert_eq!(res.status(), 202);
    let run: Value = res.json().await.unwrap();
    assert_eq!(
        run["spec"]["migration"]["matrix"],
        json!([[0.0, 4.0, 1.0], [3.0, 0.0, 2.0], [1.0, 1.0, 0.0]])
    );
    assert!(run["spec"]["migration"].get("matrix_ref").is_none());
    let from_ref = app.wait_finished(run["id"].as_str().unwrap(), FINISH).await;
    assert_eq!(from_ref["status"], "succeeded", "{from_ref:#}");
    assert!(from_ref.get("reused_from").is_none());
    assert_eq!(from_ref["provenance"]["matrix_sha256"], stored["sha256"]);

    // The inline job computed afresh gives the same results and the same spec hash.
    let res = app
        .client
        .post(app.url("/v1/runs"))
        .header("content-type", "application/json")
        .header("cache-control", "no-cache")
        .body(inline.to_string())
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 202);
    let run: Value = res.json().await.unwrap();
    let from_inline = app.wait_finished(run["id"].as_str().unwrap(), FINISH).await;
    assert!(
        from_inline.get("reused_from").is_none(),
        "no-cache computes"
    );
    assert_eq!(from_inline["results"], from_ref["results"]);
    assert_eq!(from_inline["spec"], from_ref["spec"]);
    assert_eq!(
        from_inline["provenance"]["spec_sha256"],
        from_ref["provenance"]["spec_sha256"]
    );
    assert_ne!(
        from_inline["provenance"]["request_sha256"],
        from_ref["provenance"]["request_sha256"]
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_unknown_matrix_ref_is_a_422_at_its_pointer_and_stores_nothing() {
    let app = spawn_app().await;
    let mut job = small_job();
    job["migration"] =
        json!({"orientation": "flows", "matrix_ref": format!("sha256:{}", "ab".repeat(32))});
    assert_eq!(
        pointers_of(app.post_job(&job).await).await,
        vec!["/migration/matrix_ref"]
    );
    // A stored matrix of the wrong size for the job is reported at the same pointer.
    let stored: Value = post_json_matrix(&app, &json!([[0, 1], [1, 0]]))
        .await
        .json()
        .await
        .unwrap();
    job["migration"]["matrix_ref"] = stored["id"].clone();
    assert_eq!(
        pointers_of(app.post_job(&job).await).await,
        vec!["/migration/matrix_ref"]
    );
    assert_eq!(app.stored_runs().await, 0, "a rejected job stores nothing");
    assert_eq!(stored_matrices(&app).await, 1, "only the posted matrix");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_resubmitted_spec_is_answered_at_once_from_the_succeeded_run() {
    let app = spawn_app().await;
    let job = small_job();
    let first: Value = app.post_job(&job).await.json().await.unwrap();
    let first_id = first["id"].as_str().unwrap().to_owned();
    let first = app.wait_finished(&first_id, FINISH).await;
    assert_eq!(first["status"], "succeeded", "{first:#}");
    let first_raw = app
        .get(&format!("/v1/runs/{first_id}"))
        .await
        .text()
        .await
        .unwrap();

    // Same spec, other bytes (members in another order): reused at once.
    let mut text = String::from("{");
    let members: Vec<String> = job
        .as_object()
        .unwrap()
        .iter()
        .rev()
        .map(|(k, v)| format!("{}:{v}", Value::from(k.as_str())))
        .collect();
    text.push_str(&members.join(", "));
    text.push('}');
    let res = app.post_raw(text.clone().into_bytes(), None).await;
    assert_eq!(res.status(), 202);
    assert!(!res.headers().contains_key("retry-after"));
    let location = res.headers()["location"].to_str().unwrap().to_owned();
    let reused: Value = res.json().await.unwrap();
    let reused_id = reused["id"].as_str().unwrap().to_owned();
    assert_ne!(reused_id, first_id, "a new run record");
    assert_eq!(location, format!("/v1/runs/{reused_id}"));
    assert_eq!(reused["status"], "succeeded");
    assert_eq!(reused["reused_from"], first_id.as_str());
    assert_eq!(reused["progress"]["done"], reused["progress"]["total"]);
    let p = &reused["provenance"];
    assert_eq!(p["reused_from"], first_id.as_str());
    assert_eq!(
        p["request_sha256"],
        demefix::provenance::sha256_hex(text.as_bytes())
    );
    assert_ne!(p["request_sha256"], first["provenance"]["request_sha256"]);
    for key in [
        "spec_sha256",
        "matrix_sha256",
        "method_version",
        "computed_at",
        "seed",
    ] {
        assert_eq!(p[key], first["provenance"][key], "{key}");
    }
    assert!(reused["submitted_at"].as_str().unwrap() >= first["finished_at"].as_str().unwrap());
    let warnings = reused["warnings"].as_array().unwrap();
    assert!(
        warnings
            .last()
            .unwrap()
            .as_str()
            .unwrap()
            .contains(&first_id),
        "{warnings:?}"
    );

    // The results are the same bytes as the first run's.
    let reused_raw = app
        .get(&format!("/v1/runs/{reused_id}"))
        .await
        .text()
        .await
        .unwrap();
    let results = |doc: &str| -> String {
        let start = doc.find("\"results\":").expect("results");
        let end = doc.find(",\"warnings\":").expect("warnings follow results");
        doc[start..end].to_owned()
    };
    assert_eq!(results(&reused_raw), results(&first_raw));
    assert_eq!(app.stored_runs().await, 2);

    // The earlier run is what a reuse of the reuse points to as well.
    let again: Value = app.post_job(&job).await.json().await.unwrap();
    assert_eq!(again["reused_from"], first_id.as_str());

    // Another s is another spec: queued and computed.
    let mut other = small_job();
    other["selection"]["s"] = json!([0.2]);
    let res = app.post_job(&other).await;
    assert_eq!(res.status(), 202);
    let other: Value = res.json().await.unwrap();
    assert!(other.get("reused_from").is_none());
    assert_ne!(other["status"], "succeeded");
    let other = app
        .wait_finished(other["id"].as_str().unwrap(), FINISH)
        .await;
    assert!(other.get("reused_from").is_none());
    assert_ne!(other["results"], first["results"]);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_idempotent_replay_takes_precedence_over_reuse() {
    let app = spawn_app().await;
    let body = small_job().to_string().into_bytes();
    let first: Value = app
        .post_raw(body.clone(), Some("key-1"))
        .await
        .json()
        .await
        .unwrap();
    let first_id = first["id"].as_str().unwrap().to_owned();
    app.wait_finished(&first_id, FINISH).await;
    let res = app.post_raw(body.clone(), Some("key-1")).await;
    assert_eq!(res.status(), 202);
    assert!(res.headers().contains_key("idempotent-replayed"));
    let replay: Value = res.json().await.unwrap();
    assert_eq!(replay["id"], first_id.as_str());
    assert!(replay.get("reused_from").is_none());
    // A new key with the same body is a reuse, and its own replay is that reuse again.
    let reused: Value = app
        .post_raw(body.clone(), Some("key-2"))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(reused["reused_from"], first_id.as_str());
    let replay: Value = app
        .post_raw(body, Some("key-2"))
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(replay["id"], reused["id"]);
    assert_eq!(app.stored_runs().await, 2);
    app.stop().await;
}
