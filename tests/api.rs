//! The HTTP service end to end: a real socket, a fresh SQLite file per test, `reqwest`.
//!
//! Most tests start the service in-process on port 0 (`helpers::spawn_app`); the crash
//! tests run the `demefix serve` binary as a child process and kill it.

mod api {
    mod approximations;
    mod audit;
    pub mod helpers;
    mod matrices;
    mod queue;
    mod series;
    mod verify;
    mod whatif;
}

use api::helpers::{
    ensemble_job, free_port, small_job, spawn_app, spawn_app_with, spawn_serve, wait_finished,
    ServeProcess, TempDir,
};
use serde_json::{json, Value};
use std::collections::BTreeSet;
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_submitted_job_is_queued_computed_and_fetched_with_provenance() {
    let app = spawn_app().await;
    let job = small_job();
    let body = job.to_string().into_bytes();
    let res = app.post_raw(body.clone(), None).await;
    assert_eq!(res.status(), 202);
    let location = res.headers()["location"].to_str().unwrap().to_owned();
    assert!(res.headers().contains_key("retry-after"));
    let run: Value = res.json().await.unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    assert_eq!(location, format!("/v1/runs/{id}"));
    assert!(["queued", "running"].contains(&run["status"].as_str().unwrap()));
    assert_eq!(run["spec"]["selection"]["s"], json!([0.1]));

    let done = app.wait_finished(&id, FINISH).await;
    assert_eq!(done["status"], "succeeded", "{done:#}");
    let p = &done["provenance"];
    assert_eq!(
        p["request_sha256"],
        demefix::provenance::sha256_hex(&body),
        "the hash of the bytes as sent"
    );
    assert_eq!(p["method"], "exact");
    for key in ["spec_sha256", "matrix_sha256", "normalised_matrix_sha256"] {
        assert_eq!(p[key].as_str().unwrap().len(), 64, "{key}");
    }
    assert!(p["service_version"].as_str().unwrap().contains('+'));
    let results = done["results"].as_array().unwrap();
    assert_eq!(results.len(), 2, "one result per start");
    for r in results {
        let pf = r["fixation_probability"].as_f64().unwrap();
        assert!(pf > 0.0 && pf < 1.0, "{r}");
    }
    assert_eq!(done["progress"]["done"], done["progress"]["total"]);
    assert!(done["finished_at"].is_string());

    // The same job through the library gives the same results.
    let validated = demefix::spec::parse_bytes(&body, &demefix::spec::Limits::default()).unwrap();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    let local = demefix::compute::run(
        &validated,
        &pool,
        &demefix_science::ensemble::NoProgress,
        &std::sync::atomic::AtomicBool::new(false),
    )
    .unwrap();
    assert_eq!(
        done["results"],
        serde_json::to_value(&local.results).unwrap()
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_finished_run_has_a_strong_etag_and_answers_304() {
    let app = spawn_app().await;
    let run: Value = app.post_job(&small_job()).await.json().await.unwrap();
    let id = run["id"].as_str().unwrap();
    app.wait_finished(id, FINISH).await;
    let res = app.get(&format!("/v1/runs/{id}")).await;
    let etag = res.headers()["etag"].to_str().unwrap().to_owned();
    assert!(etag.starts_with('"') && !etag.starts_with("W/"), "{etag}");
    let again = app
        .client
        .get(app.url(&format!("/v1/runs/{id}")))
        .header("If-None-Match", &etag)
        .send()
        .await
        .unwrap();
    assert_eq!(again.status(), 304);
    app.stop().await;
}

async fn problems_of(app: &api::helpers::TestApp, body: Vec<u8>) -> Vec<(String, String)> {
    let res = app.post_raw(body, None).await;
    assert_eq!(res.status(), 422);
    assert_eq!(
        res.headers()["content-type"].to_str().unwrap(),
        "application/problem+json"
    );
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["status"], 422);
    assert_eq!(doc["title"], "Invalid job");
    doc["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["pointer"].as_str().unwrap().to_owned(),
                e["detail"].as_str().unwrap().to_owned(),
            )
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_malformed_job_is_a_422_with_its_pointers_and_stores_nothing() {
    let app = spawn_app().await;
    type Edit = fn(&mut Value);
    let table: &[(&str, Edit, &[&str])] = &[
        (
            "NaN via csv",
            |j| {
                j["migration"] =
                    json!({"orientation": "flows", "matrix_csv": "a,b,c\n0,4,1\n3,0,NaN\n1,1,0\n"})
            },
            &["/migration/matrix_csv"],
        ),
        (
            "negative entry",
            |j| j["migration"]["matrix"][1][2] = json!(-2),
            &["/migration/matrix/1/2"],
        ),
        (
            "non-square",
            |j| j["migration"]["matrix"] = json!([[0, 4, 1], [3, 0], [1, 1, 0]]),
            &["/migration/matrix/1"],
        ),
        (
            "empty row",
            |j| j["migration"]["matrix"][2] = json!([]),
            &["/migration/matrix/2"],
        ),
        (
            "unknown start",
            |j| j["start"] = json!(["a", "nowhere"]),
            &["/start/1"],
        ),
        (
            "duplicate deme id",
            |j| j["population"]["demes"][1]["id"] = json!("a"),
            &["/population/demes/1/id"],
        ),
        (
            "wrong type",
            |j| j["population"]["demes"][2]["size"] = json!("2"),
            &["/population/demes/2/size"],
        ),
        (
            "two source groups feeding one deme (never absorbed)",
            |j| {
                j["migration"] = json!({"orientation": "recruitment",
                    "matrix": [[1, 0, 0], [0, 1, 0], [0.5, 0.5, 0]]})
            },
            &["/migration"],
        ),
        (
            "two problems at once",
            |j| {
                j["selection"]["s"] = json!([-1.0, 0.1]);
                j["method"]["replicate"] = json!(10);
            },
            &["/selection/s/0", "/method/replicate"],
        ),
    ];
    for (name, edit, want) in table {
        let mut job = small_job();
        edit(&mut job);
        let got = problems_of(&app, job.to_string().into_bytes()).await;
        let pointers: BTreeSet<&str> = got.iter().map(|(p, _)| p.as_str()).collect();
        let want: BTreeSet<&str> = want.iter().copied().collect();
        assert_eq!(pointers, want, "{name}: {got:?}");
    }
    let got = problems_of(&app, b"{not json".to_vec()).await;
    assert_eq!(got[0].0, "");
    assert_eq!(app.stored_runs().await, 0, "a rejected job stores nothing");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_unknown_run_is_a_404_problem() {
    let app = spawn_app().await;
    for path in [
        "/v1/runs/01900000-0000-7000-8000-000000000000",
        "/v1/runs/not-a-uuid",
        "/v1/runs/01900000-0000-7000-8000-000000000000/cancel",
        "/nowhere",
    ] {
        let res = if path.ends_with("/cancel") {
            app.client.post(app.url(path)).send().await.unwrap()
        } else {
            app.get(path).await
        };
        assert_eq!(res.status(), 404, "{path}");
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json"
        );
        let doc: Value = res.json().await.unwrap();
        assert_eq!(doc["status"], 404);
        assert!(doc["type"].is_string() && doc["title"].is_string() && doc["detail"].is_string());
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_known_path_with_another_method_is_a_405_problem_naming_the_allowed_methods() {
    let app = spawn_app().await;
    for (method, path, allow) in [
        (reqwest::Method::DELETE, "/v1/runs", "POST, GET"),
        (
            reqwest::Method::PUT,
            "/v1/runs/01900000-0000-7000-8000-000000000000",
            "GET",
        ),
        (reqwest::Method::GET, "/v1/matrices", "POST"),
        (reqwest::Method::POST, "/healthz", "GET"),
    ] {
        let res = app
            .client
            .request(method.clone(), app.url(path))
            .send()
            .await
            .unwrap();
        assert_eq!(res.status(), 405, "{method} {path}");
        assert_eq!(res.headers()["allow"].to_str().unwrap(), allow);
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json"
        );
        let doc: Value = res.json().await.unwrap();
        assert_eq!(doc["status"], 405);
        assert_eq!(doc["title"], "Method not allowed");
    }
    assert_eq!(app.stored_runs().await, 0);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_oversize_body_is_a_413_problem_and_stores_nothing() {
    let app = spawn_app_with(|raw| raw.body_limit = Some("2048".to_owned())).await;
    let mut job = small_job();
    job["label"] = json!("x".repeat(3000));
    let res = app.post_job(&job).await;
    assert_eq!(res.status(), 413);
    assert_eq!(
        res.headers()["content-type"].to_str().unwrap(),
        "application/problem+json"
    );
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["status"], 413);
    // Far beyond the limit: answered from Content-Length alone.
    job["label"] = json!("x".repeat(100_000));
    assert_eq!(app.post_job(&job).await.status(), 413);
    // Just under the limit is fine.
    assert_eq!(app.post_job(&small_job()).await.status(), 202);
    assert_eq!(app.stored_runs().await, 1);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn twenty_parallel_posts_with_one_idempotency_key_make_one_run() {
    let app = std::sync::Arc::new(spawn_app().await);
    let body = small_job().to_string().into_bytes();
    let mut tasks = Vec::new();
    for _ in 0..20 {
        let app = app.clone();
        let body = body.clone();
        tasks.push(tokio::spawn(async move {
            let res = app.post_raw(body, Some("nightly-2026-11-30")).await;
            let status = res.status().as_u16();
            let replayed = res.headers().contains_key("idempotent-replayed");
            let run: Value = res.json().await.unwrap();
            (status, replayed, run["id"].as_str().unwrap().to_owned())
        }));
    }
    let mut ids = BTreeSet::new();
    let mut fresh = 0;
    for t in tasks {
        let (status, replayed, id) = t.await.unwrap();
        assert_eq!(status, 202);
        fresh += usize::from(!replayed);
        ids.insert(id);
    }
    assert_eq!(ids.len(), 1, "{ids:?}");
    assert_eq!(fresh, 1, "exactly one request created the run");
    assert_eq!(app.stored_runs().await, 1);

    // Same key, different body: 422 naming the run.
    let mut other = small_job();
    other["selection"]["s"] = json!([0.2]);
    let res = app
        .post_raw(other.to_string().into_bytes(), Some("nightly-2026-11-30"))
        .await;
    assert_eq!(res.status(), 422);
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["run_id"].as_str(), ids.first().map(String::as_str));
    assert_eq!(app.stored_runs().await, 1);
    let app = std::sync::Arc::into_inner(app).expect("every task is done");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_running_ensemble_is_cancelled_and_stays_cancelled() {
    // One worker, heartbeat every second: the cancellation is seen within a beat and the
    // ensemble stops at its next chunk boundary.
    let app = spawn_app_with(|raw| raw.workers = Some("1".to_owned())).await;
    let run: Value = app
        .post_job(&ensemble_job(1_000_000, 100))
        .await
        .json()
        .await
        .unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    // A queued job behind it is cancelled at once.
    let queued: Value = app.post_job(&small_job()).await.json().await.unwrap();
    let queued_id = queued["id"].as_str().unwrap();
    let res = app
        .client
        .post(app.url(&format!("/v1/runs/{queued_id}/cancel")))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    let body: Value = res.json().await.unwrap();
    assert_eq!(body["status"], "cancelled");

    let res = app
        .client
        .post(app.url(&format!("/v1/runs/{id}/cancel")))
        .send()
        .await
        .unwrap();
    assert!([200, 202].contains(&res.status().as_u16()));
    let done = app.wait_finished(&id, FINISH).await;
    assert_eq!(done["status"], "cancelled", "{done:#}");
    assert!(done.get("results").is_none());
    let total = done["progress"]["total"].as_u64().unwrap();
    assert!(done["progress"]["done"].as_u64().unwrap() < total);

    // Finished runs do not change: cancelling again is idempotent, and the queued run that
    // was cancelled never ran.
    let res = app
        .client
        .post(app.url(&format!("/v1/runs/{id}/cancel")))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    let q: Value = app.get_json(&format!("/v1/runs/{queued_id}")).await;
    assert_eq!(q["status"], "cancelled");
    assert!(q.get("started_at").is_none());
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn runs_are_listed_newest_first_with_a_cursor_and_a_status_filter() {
    let app = spawn_app_with(|raw| raw.workers = Some("1".to_owned())).await;
    let mut ids = Vec::new();
    for k in 0..5 {
        let mut job = small_job();
        job["label"] = json!(format!("job {k}"));
        let run: Value = app.post_job(&job).await.json().await.unwrap();
        ids.push(run["id"].as_str().unwrap().to_owned());
    }
    ids.reverse();
    let page: Value = app.get("/v1/runs?limit=3").await.json().await.unwrap();
    let first: Vec<&str> = page["runs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["id"].as_str().unwrap())
        .collect();
    assert_eq!(
        first,
        ids[..3].iter().map(String::as_str).collect::<Vec<_>>()
    );
    let next = page["next"].as_str().unwrap();
    let page: Value = app
        .get_json(&format!("/v1/runs?limit=3&after={next}"))
        .await;
    let second: Vec<&str> = page["runs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["id"].as_str().unwrap())
        .collect();
    assert_eq!(
        second,
        ids[3..].iter().map(String::as_str).collect::<Vec<_>>()
    );
    assert!(page["next"].is_null());

    for id in &ids {
        app.wait_finished(id, FINISH).await;
    }
    let ok: Value = app.get_json("/v1/runs?status=succeeded").await;
    assert_eq!(ok["runs"].as_array().unwrap().len(), 5);
    let none: Value = app.get_json("/v1/runs?status=queued").await;
    assert_eq!(none["runs"].as_array().unwrap().len(), 0);
    let series: Value = app.get_json("/v1/runs?series=elsewhere").await;
    assert_eq!(series["runs"].as_array().unwrap().len(), 0);
    for bad in [
        "/v1/runs?limit=0",
        "/v1/runs?status=done",
        "/v1/runs?after=x",
        "/v1/runs?colour=red",
    ] {
        let res = app.get(bad).await;
        assert_eq!(res.status(), 400, "{bad}");
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json"
        );
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_readiness_metrics_and_the_api_description_are_served() {
    let app = spawn_app().await;
    assert_eq!(app.get("/healthz").await.status(), 200);
    let ready = app.get("/readyz").await;
    assert_eq!(ready.status(), 200);
    let ready: Value = ready.json().await.unwrap();
    assert_eq!(ready["workers"], 2);
    let metrics = app.get("/metrics").await.text().await.unwrap();
    assert!(
        metrics.contains("demefix_http_request_duration_seconds"),
        "{metrics}"
    );
    let yaml = app.get("/openapi.yaml").await.text().await.unwrap();
    assert!(yaml.starts_with("openapi: 3.1"));
    app.stop().await;
}

#[test]
fn the_registered_routes_are_the_paths_of_openapi_yaml() {
    let yaml = demefix::http::OPENAPI;
    let mut documented = BTreeSet::new();
    let mut in_paths = false;
    let mut path: Option<String> = None;
    for line in yaml.lines() {
        if !line.is_empty() && !line.starts_with(' ') {
            in_paths = line == "paths:";
            path = None;
        } else if !in_paths {
        } else if let Some(p) = line.strip_prefix("  /").and_then(|l| l.strip_suffix(':')) {
            path = Some(format!("/{p}"));
        } else if let (Some(p), Some(m)) = (&path, line.strip_prefix("    ")) {
            let method = m.trim_end_matches(':');
            if ["get", "post", "put", "delete", "patch"].contains(&method) {
                documented.insert((method.to_uppercase(), p.clone()));
            }
        }
    }
    assert!(documented.len() >= 8, "{documented:?}");
    let registered: BTreeSet<(String, String)> = demefix::http::ROUTES
        .iter()
        .map(|(m, p)| ((*m).to_owned(), (*p).to_owned()))
        .collect();
    assert_eq!(registered, documented);
}

/// A `demefix serve` child process on a fresh port, its database in `dir`, one worker and
/// short leases.
async fn spawn_child(dir: &TempDir) -> ServeProcess {
    let port = free_port();
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_demefix"));
    command
        .arg("serve")
        .env("DEMEFIX_BIND", format!("127.0.0.1:{port}"))
        .env("DEMEFIX_DB", dir.0.join("demefix.db"))
        .env("DEMEFIX_WORKERS", "1")
        .env("DEMEFIX_LEASE_SECS", "2")
        .env("DEMEFIX_HEARTBEAT_SECS", "1")
        .env("RUST_LOG", "warn");
    spawn_serve(command, port, None).await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_202_survives_sigkill_and_the_run_finishes_after_restart() {
    let dir = TempDir::new("sigkill");
    let client = reqwest::Client::new();
    let mut child = spawn_child(&dir).await;
    let res = client
        .post(format!("{}/v1/runs", child.base))
        .header("content-type", "application/json")
        .body(small_job().to_string())
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 202);
    child.process.kill().unwrap(); // SIGKILL
    let run: Value = res.json().await.unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    child.process.wait().unwrap();

    let mut child = spawn_child(&dir).await;
    let res = client
        .get(format!("{}/v1/runs/{id}", child.base))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200, "the run exists after the restart");
    let done = wait_finished(&client, &child.base, &id, FINISH).await;
    assert_eq!(done["status"], "succeeded", "{done:#}");
    child.process.kill().unwrap();
    child.process.wait().unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_puts_a_running_ensemble_back_in_the_queue_and_a_restart_finishes_it() {
    let dir = TempDir::new("sigterm");
    let client = reqwest::Client::new();
    let mut child = spawn_child(&dir).await;
    let job = ensemble_job(40_000, 500);
    let run: Value = client
        .post(format!("{}/v1/runs", child.base))
        .header("content-type", "application/json")
        .body(job.to_string())
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    // Wait until it runs and has committed progress.
    let mut seen_running = false;
    for _ in 0..200 {
        let r: Value = client
            .get(format!("{}/v1/runs/{id}", child.base))
            .send()
            .await
            .unwrap()
            .json()
            .await
            .unwrap();
        if r["status"] == "running" && r["progress"]["done"].as_u64() > Some(0) {
            seen_running = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let status = std::process::Command::new("kill")
        .args(["-TERM", &child.process.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let exit = child.process.wait().unwrap();
    assert!(exit.success(), "a drained shutdown exits 0: {exit:?}");

    assert!(
        seen_running,
        "the ensemble was running when SIGTERM arrived"
    );

    let mut child = spawn_child(&dir).await;
    let after: Value = client
        .get(format!("{}/v1/runs/{id}", child.base))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    assert!(
        ["queued", "running"].contains(&after["status"].as_str().unwrap()),
        "the drained run went back to the queue: {after:#}"
    );
    let done = wait_finished(&client, &child.base, &id, Duration::from_secs(120)).await;
    assert_eq!(
        done["status"], "succeeded",
        "nothing is lost or failed: {done:#}"
    );
    assert_eq!(done["progress"]["done"], done["progress"]["total"]);
    child.process.kill().unwrap();
    child.process.wait().unwrap();
}

/// Reliability promise 5: an ensemble killed mid-run resumes from its last committed chunk
/// and ends byte-identical to an uninterrupted run of the same spec and seed.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_ensemble_killed_mid_run_resumes_to_a_byte_identical_result() {
    let dir = TempDir::new("sigkill-mid-ensemble");
    let client = reqwest::Client::new();
    let job = ensemble_job(20_000, 500).to_string();
    let mut child = spawn_child(&dir).await;
    let run: Value = client
        .post(format!("{}/v1/runs", child.base))
        .header("content-type", "application/json")
        .body(job.clone())
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    let mut done_at_kill = 0;
    for _ in 0..2_000 {
        let r: Value = client
            .get(format!("{}/v1/runs/{id}", child.base))
            .send()
            .await
            .unwrap()
            .json()
            .await
            .unwrap();
        let done = r["progress"]["done"].as_u64().unwrap_or(0);
        if r["status"] == "running" && done > 0 {
            done_at_kill = done;
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    child.process.kill().unwrap(); // SIGKILL, mid-ensemble
    child.process.wait().unwrap();
    assert!(
        done_at_kill > 0,
        "the ensemble had committed chunks when it was killed"
    );

    let mut child = spawn_child(&dir).await;
    let resumed = wait_finished(&client, &child.base, &id, Duration::from_secs(180)).await;
    assert_eq!(resumed["status"], "succeeded", "{resumed:#}");
    assert!(
        done_at_kill < resumed["progress"]["total"].as_u64().unwrap(),
        "the kill came before the end of the run"
    );

    // The same job again, computed from scratch by the same server (`no-cache`: not answered
    // from the finished run by reuse).
    let clean: Value = client
        .post(format!("{}/v1/runs", child.base))
        .header("content-type", "application/json")
        .header("cache-control", "no-cache")
        .body(job)
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    let clean_id = clean["id"].as_str().unwrap().to_owned();
    let clean = wait_finished(&client, &child.base, &clean_id, Duration::from_secs(180)).await;
    assert_eq!(clean["status"], "succeeded", "{clean:#}");
    assert!(clean["reused_from"].is_null(), "{clean:#}");
    assert_eq!(
        resumed["results"].to_string(),
        clean["results"].to_string(),
        "the resumed run's results are byte-identical to a clean run's"
    );
    child.process.kill().unwrap();
    child.process.wait().unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_expired_lease_is_rescued_and_the_stale_worker_is_fenced_out() {
    use demefix::db::{Store, Submitted};
    use demefix::domain::{prepare, Finish};
    let dir = TempDir::new("fencing");
    let store = Store::open(&dir.0.join("demefix.db")).await.unwrap();
    let body = small_job().to_string().into_bytes();
    let new = prepare(&body, None, &demefix::spec::Limits::default()).unwrap();
    let Submitted::Created(run) = store.submit(&new).await.unwrap() else {
        panic!("a fresh store has no such run")
    };

    // Worker A claims with a lease that is already over when the next claim looks.
    let a = store
        .claim("token-a", Duration::from_millis(0))
        .await
        .unwrap()
        .expect("the queued run is claimed");
    assert_eq!(a.id, run.id);
    assert_eq!(a.attempt, 1);
    tokio::time::sleep(Duration::from_millis(20)).await;
    let b = store
        .claim("token-b", Duration::from_secs(60))
        .await
        .unwrap()
        .expect("the expired lease is rescued");
    assert_eq!(b.id, run.id);
    assert_eq!(b.attempt, 2);
    // A live lease is not taken.
    assert!(store
        .claim("token-c", Duration::from_secs(60))
        .await
        .unwrap()
        .is_none());

    // A's heartbeat and completion are rejected once its lease was taken.
    assert_eq!(
        store
            .heartbeat(&run.id, "token-a", Duration::from_secs(60), 1)
            .await
            .unwrap(),
        None
    );
    // Only the lease holder appends to the checkpoint log; a later claim gets it in order.
    assert_eq!(
        store
            .commit_chunk(&run.id, "token-a", Duration::from_secs(60), 1, 0, "stale")
            .await
            .unwrap(),
        None
    );
    for (seq, step) in ["first", "second"].into_iter().enumerate() {
        assert_eq!(
            store
                .commit_chunk(
                    &run.id,
                    "token-b",
                    Duration::from_secs(0),
                    1,
                    seq as u64,
                    step
                )
                .await
                .unwrap(),
            Some(false)
        );
    }
    tokio::time::sleep(Duration::from_millis(20)).await;
    let c = store
        .claim("token-c", Duration::from_secs(60))
        .await
        .unwrap()
        .expect("the expired lease is rescued again");
    assert_eq!(c.checkpoint, vec!["first".to_owned(), "second".to_owned()]);
    assert!(!store.discard_chunks(&run.id, "token-b").await.unwrap());
    assert!(store.discard_chunks(&run.id, "token-c").await.unwrap());
    let d = store
        .claim("token-d", Duration::from_secs(0))
        .await
        .unwrap();
    assert!(d.is_none(), "token-c's lease is live");
    let failed = Finish::Failed {
        error: "stale".to_owned(),
    };
    assert!(!store.finish(&run.id, "token-a", &failed).await.unwrap());
    assert!(!store.finish(&run.id, "token-b", &failed).await.unwrap());
    let ok = Finish::Succeeded {
        provenance: "{}".to_owned(),
        results: "[]".to_owned(),
        sensitivity: None,
        whatif: None,
        warnings: vec![],
    };
    assert!(store.finish(&run.id, "token-c", &ok).await.unwrap());
    assert!(!store.finish(&run.id, "token-c", &failed).await.unwrap());
    let stored = store.run(&run.id).await.unwrap().unwrap();
    assert_eq!(stored.status.as_str(), "succeeded");
    assert_eq!(stored.error, None);
    store.close().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn link_sensitivities_are_stored_served_and_reused_with_the_results() {
    let app = spawn_app().await;
    let mut job = small_job();
    job["outputs"] = json!({"sensitivity": true});
    let first: Value = app.post_job(&job).await.json().await.unwrap();
    let id = first["id"].as_str().unwrap().to_owned();
    let done = app.wait_finished(&id, FINISH).await;
    assert_eq!(done["status"], "succeeded", "{done:#}");
    let rows = done["sensitivity"].as_array().expect("sensitivity served");
    assert!(!rows.is_empty());
    let results = done["results"].as_array().unwrap();
    for r in rows {
        assert!(results
            .iter()
            .any(|x| x["s"] == r["s"] && x["start"] == r["start"]));
        assert!(r["d_fixation_probability"].as_f64().unwrap().is_finite());
    }
    // the same spec again is answered by reuse, sensitivities included, byte for byte
    let again: Value = app.post_job(&job).await.json().await.unwrap();
    assert_eq!(again["reused_from"], json!(id), "{again:#}");
    let again = app
        .wait_finished(again["id"].as_str().unwrap(), FINISH)
        .await;
    assert_eq!(
        again["sensitivity"].to_string(),
        done["sensitivity"].to_string()
    );
    // without the output, no sensitivity member
    let plain: Value = app.post_job(&small_job()).await.json().await.unwrap();
    let plain = app
        .wait_finished(plain["id"].as_str().unwrap(), FINISH)
        .await;
    assert!(plain.get("sensitivity").is_none(), "{plain:#}");
    app.stop().await;
}
