//! The queue under pressure: listing filters, leases and a concurrent write storm, and the
//! metrics the queue reports (in a `demefix serve` child process configured by a TOML file,
//! so its metrics recorder is its own).

use super::helpers::{
    ensemble_job, free_port, small_job, spawn_app, spawn_app_with, spawn_serve, wait_finished,
    ServeProcess, TempDir,
};
use serde_json::{json, Value};
use std::collections::{BTreeMap, BTreeSet};
use std::time::{Duration, Instant};

const FINISH: Duration = Duration::from_secs(120);

/// The ids of the runs of a `GET /v1/runs` page, in the order listed.
async fn listed(app: &super::helpers::TestApp, query: &str) -> Vec<String> {
    let res = app.get(&format!("/v1/runs?{query}")).await;
    assert_eq!(res.status(), 200, "{query}");
    let page: Value = res.json().await.unwrap();
    page["runs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["id"].as_str().unwrap().to_owned())
        .collect()
}

/// A small exact job made distinct (and not reusable from another run) by its `s`.
fn distinct_small_job(label: &str, s: f64) -> Value {
    let mut job = small_job();
    job["label"] = json!(label);
    job["selection"]["s"] = json!([s]);
    job
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn runs_are_filtered_by_the_time_they_were_submitted() {
    let app = spawn_app_with(|raw| raw.workers = Some("1".to_owned())).await;
    let mut ids = Vec::new();
    for k in 0..4 {
        if k == 2 {
            tokio::time::sleep(Duration::from_millis(60)).await;
        }
        let res = app
            .post_job(&distinct_small_job(
                &format!("since {k}"),
                0.1 + 0.01 * k as f64,
            ))
            .await;
        assert_eq!(res.status(), 202);
        let run: Value = res.json().await.unwrap();
        ids.push(run["id"].as_str().unwrap().to_owned());
    }
    let newest_first = |range: std::ops::Range<usize>| -> Vec<String> {
        ids[range].iter().rev().cloned().collect()
    };
    // `cut` lies between the second and the third submission.
    let first: Value = app.get_json(&format!("/v1/runs/{}", ids[1])).await;
    let second_at = chrono::DateTime::parse_from_rfc3339(first["submitted_at"].as_str().unwrap())
        .unwrap()
        .with_timezone(&chrono::Utc);
    let cut = second_at + chrono::Duration::milliseconds(20);
    let third: Value = app.get_json(&format!("/v1/runs/{}", ids[2])).await;
    let third_at =
        chrono::DateTime::parse_from_rfc3339(third["submitted_at"].as_str().unwrap()).unwrap();
    assert!(third_at > cut, "the test's pause separates the submissions");

    let utc = cut.to_rfc3339_opts(chrono::SecondsFormat::Millis, true);
    assert_eq!(
        listed(&app, &format!("since={utc}")).await,
        newest_first(2..4)
    );
    // The same instant written with an offset (`+` escaped in the query).
    let offset = cut
        .with_timezone(&chrono::FixedOffset::east_opt(2 * 3600).unwrap())
        .to_rfc3339_opts(chrono::SecondsFormat::Micros, false);
    assert!(offset.ends_with("+02:00"), "{offset}");
    let escaped = offset.replace('+', "%2B");
    assert_eq!(
        listed(&app, &format!("since={escaped}")).await,
        newest_first(2..4)
    );
    // `since` is inclusive: the exact submission time of the second run includes it.
    let inclusive = second_at.to_rfc3339_opts(chrono::SecondsFormat::Millis, true);
    assert_eq!(
        listed(&app, &format!("since={inclusive}")).await,
        newest_first(1..4)
    );
    // Combined with a page size and the cursor.
    assert_eq!(
        listed(&app, &format!("since={utc}&limit=1&after={}", ids[3])).await,
        vec![ids[2].clone()]
    );
    assert_eq!(
        listed(&app, "since=2000-01-01T00:00:00Z").await,
        newest_first(0..4)
    );
    assert!(listed(&app, "since=2999-01-01T00:00:00Z").await.is_empty());

    for bad in [
        "yesterday",
        "2026-12-01",
        "2026-13-01T00:00:00Z",
        "2026-12-01T25:00:00Z",
        "2026-12-01T00:00:00",
        "",
    ] {
        let res = app.get(&format!("/v1/runs?since={bad}")).await;
        assert_eq!(res.status(), 400, "since={bad:?}");
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json",
            "since={bad:?}"
        );
        let problem: Value = res.json().await.unwrap();
        assert_eq!(problem["status"], 400);
        assert!(
            problem["detail"].as_str().unwrap().contains("since"),
            "{problem}"
        );
    }
    app.stop().await;
}

/// Opens the database file of a running service for reading, beside the service.
async fn read_db(path: &std::path::Path) -> sqlx::SqlitePool {
    let options = sqlx::sqlite::SqliteConnectOptions::new()
        .filename(path)
        .read_only(true);
    sqlx::sqlite::SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(options)
        .await
        .expect("the database opens read-only")
}

async fn attempts(db: &sqlx::SqlitePool, id: &str) -> i64 {
    sqlx::query_scalar("SELECT attempts FROM runs WHERE id = ?")
        .bind(id)
        .fetch_one(db)
        .await
        .expect("the run is stored")
}

/// One ensemble of `replicates` per cell, one chunk per cell (so no checkpoint extends the
/// lease within a cell), computed to the end while the test, playing a second worker, tries
/// to rescue it every 250 ms. Returns the finished run and how long it ran.
async fn run_while_an_intruder_tries_to_rescue_it(
    app: &super::helpers::TestApp,
    db: &sqlx::SqlitePool,
    replicates: u64,
) -> (Value, chrono::Duration) {
    let store = &app.running.as_ref().expect("running").store;
    let res = app.post_job(&ensemble_job(replicates, replicates)).await;
    assert_eq!(res.status(), 202);
    let run: Value = res.json().await.unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    let deadline = Instant::now() + FINISH;
    let done = loop {
        let r: Value = app.get_json(&format!("/v1/runs/{id}")).await;
        match r["status"].as_str().unwrap() {
            "queued" => {}
            "running" => {
                let rescued = store
                    .claim("intruder", Duration::from_secs(60))
                    .await
                    .expect("the claim is answered");
                if let Some(claim) = rescued {
                    panic!(
                        "run {} was rescued (attempt {}) while its worker heartbeats",
                        claim.id, claim.attempt
                    );
                }
                assert_eq!(attempts(db, &id).await, 1, "claimed only once so far");
            }
            _ => break r,
        }
        assert!(Instant::now() < deadline, "the run did not finish: {r:#}");
        tokio::time::sleep(Duration::from_millis(250)).await;
    };
    assert_eq!(done["status"], "succeeded", "{done:#}");
    assert_eq!(attempts(db, &id).await, 1, "claimed once, computed once");
    assert_eq!(done["progress"]["done"], done["progress"]["total"]);
    let results = done["results"].as_array().unwrap();
    assert_eq!(results.len(), 4, "two values of s times two starts");
    for r in results {
        assert_eq!(r["method"], "ensemble:event");
        assert_eq!(r["replicates"], replicates, "{r}");
        let counted = ["fixed", "lost", "unresolved"]
            .iter()
            .map(|k| r[*k].as_u64().unwrap())
            .sum::<u64>();
        assert_eq!(counted, replicates, "every replicate counted once: {r}");
    }
    let at = |key: &str| chrono::DateTime::parse_from_rfc3339(done[key].as_str().unwrap()).unwrap();
    let ran = at("finished_at") - at("started_at");
    (done, ran)
}

/// Reliability promise 3: a run is rescued by an expired lease, never by elapsed time. A run
/// whose worker keeps heartbeating for more than twice the lease is neither rescued nor run a
/// second time, and its result is complete. The ensemble is sized up until it runs that long
/// on the machine at hand (a fast idle machine needs more replicates than a loaded one).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_run_that_heartbeats_past_twice_the_lease_is_neither_rescued_nor_rerun() {
    const LEASE_SECS: i64 = 2;
    let dir = TempDir::new("heartbeat");
    let db_path = dir.0.join("demefix.db");
    let app = spawn_app_with(|raw| {
        raw.db = Some(db_path.display().to_string());
        raw.workers = Some("1".to_owned());
        raw.lease_secs = Some(LEASE_SECS.to_string());
        raw.heartbeat_secs = Some("1".to_owned());
    })
    .await;
    let db = read_db(&db_path).await;
    let twice_the_lease = chrono::Duration::seconds(2 * LEASE_SECS);
    let mut replicates = 60_000;
    let mut tried = Vec::new();
    loop {
        let (_, ran) = run_while_an_intruder_tries_to_rescue_it(&app, &db, replicates).await;
        tried.push((replicates, ran));
        if ran > twice_the_lease + chrono::Duration::milliseconds(500) {
            break;
        }
        assert!(
            tried.len() < 4,
            "no ensemble ran longer than twice the lease: {tried:?}"
        );
        // Aim at about three times the lease.
        let factor =
            (3.0 * LEASE_SECS as f64 * 1e3 / ran.num_milliseconds().max(1) as f64).clamp(2.0, 20.0);
        replicates = (replicates as f64 * factor) as u64;
    }
    eprintln!("heartbeat test: {tried:?}");
    db.close().await;
    app.stop().await;
}

/// Reliability promise 7: a bounded write storm (submissions from 8 clients while one worker
/// heartbeats and commits a checkpoint every chunk and the other completes the submitted
/// runs) sees no 5xx and no "database is locked", and every 202 is stored.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_concurrent_write_storm_sees_no_5xx_and_every_202_is_stored() {
    const CLIENTS: usize = 8;
    const PER_CLIENT: usize = 200;
    let app = spawn_app().await;
    // Far too long to finish within the test; it commits a checkpoint every 1,000 replicates.
    let busy = app.post_job(&ensemble_job(5_000_000, 1_000)).await;
    assert_eq!(busy.status(), 202);
    let busy: Value = busy.json().await.unwrap();
    let busy_id = busy["id"].as_str().unwrap().to_owned();
    let started = Instant::now();
    loop {
        let r: Value = app.get_json(&format!("/v1/runs/{busy_id}")).await;
        if r["progress"]["done"].as_u64() > Some(0) {
            break;
        }
        assert!(
            started.elapsed() < FINISH,
            "the busy ensemble never started"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    }

    let storm = Instant::now();
    let mut clients = Vec::new();
    for c in 0..CLIENTS {
        let client = app.client.clone();
        let url = app.url("/v1/runs");
        clients.push(tokio::spawn(async move {
            let mut accepted = Vec::new();
            let mut latencies = Vec::new();
            for k in 0..PER_CLIENT {
                let n = c * PER_CLIENT + k;
                let job = distinct_small_job(&format!("storm {c}/{k}"), 0.01 + 1e-4 * n as f64);
                let sent = Instant::now();
                let res = client
                    .post(&url)
                    .header("content-type", "application/json")
                    .body(job.to_string())
                    .send()
                    .await
                    .expect("the request is answered");
                let status = res.status().as_u16();
                let body = res.text().await.expect("a body");
                latencies.push(sent.elapsed());
                assert!(
                    !body.to_lowercase().contains("database is locked"),
                    "client {c}, submission {k}: {status} {body}"
                );
                assert!(status < 500, "client {c}, submission {k}: {status} {body}");
                assert_eq!(status, 202, "client {c}, submission {k}: {body}");
                let run: Value = serde_json::from_str(&body).unwrap();
                accepted.push(run["id"].as_str().unwrap().to_owned());
            }
            (accepted, latencies)
        }));
    }
    let mut ids = BTreeSet::new();
    let mut latencies = Vec::new();
    for c in clients {
        let (accepted, lat) = c.await.expect("a client finished");
        ids.extend(accepted);
        latencies.extend(lat);
    }
    let took = storm.elapsed();
    latencies.sort();
    let p99 = latencies[latencies.len() * 99 / 100];
    eprintln!(
        "write storm: {} submissions in {took:?} ({:.0}/s), p50 {:?}, p99 {p99:?}",
        latencies.len(),
        latencies.len() as f64 / took.as_secs_f64(),
        latencies[latencies.len() / 2],
    );
    assert_eq!(
        ids.len(),
        CLIENTS * PER_CLIENT,
        "every 202 names its own run"
    );
    assert_eq!(
        app.stored_runs().await,
        (CLIENTS * PER_CLIENT + 1) as i64,
        "every 202 is stored, and nothing else"
    );
    let busy: Value = app.get_json(&format!("/v1/runs/{busy_id}")).await;
    assert_eq!(
        busy["status"], "running",
        "the workers were busy all along: {busy:#}"
    );
    app.stop().await;
}

/// Starts `demefix serve` with `DEMEFIX_CONFIG` naming `config_file` and `env` set on top
/// (every other `DEMEFIX_*` variable removed), its log in `log`, and waits until it is ready.
async fn serve_with_config_file(
    config_file: &std::path::Path,
    log: &std::path::Path,
    port: u16,
    env: &[(&str, &str)],
) -> ServeProcess {
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_demefix"));
    command.arg("serve");
    for (name, _) in demefix::config::SETTINGS {
        command.env_remove(name);
    }
    command
        .env(demefix::config::CONFIG_FILE_VAR, config_file)
        .env("RUST_LOG", "warn")
        .envs(env.iter().copied());
    spawn_serve(command, port, Some(log)).await
}

/// The samples of the Prometheus text `text`: `name{labels}` to value.
fn samples(text: &str) -> BTreeMap<String, f64> {
    text.lines()
        .filter(|l| !l.starts_with('#') && !l.trim().is_empty())
        .filter_map(|l| {
            let (series, value) = l.rsplit_once(' ')?;
            Some((series.to_owned(), value.parse().ok()?))
        })
        .collect()
}

/// An exact job of about 10^5 states (death-birth on three demes of 45): seconds of work,
/// long enough to be seen running.
fn slow_exact_job() -> Value {
    json!({
        "label": "slow exact",
        "population": {"demes": [{"id": "a", "size": 45}, {"id": "b", "size": 45}, {"id": "c", "size": 45}]},
        "migration": {"orientation": "flows", "matrix": [[0, 4, 1], [3, 0, 2], [1, 1, 0]]},
        "dynamics": {"rule": "death_birth"},
        "selection": {"s": [0.02, 0.04]},
        "start": ["a", "uniform"],
        "method": {"kind": "exact"}
    })
}

async fn post(client: &reqwest::Client, base: &str, job: &Value) -> String {
    let res = client
        .post(format!("{base}/v1/runs"))
        .header("content-type", "application/json")
        .body(job.to_string())
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 202);
    let run: Value = res.json().await.unwrap();
    run["id"].as_str().unwrap().to_owned()
}

async fn status_of(client: &reqwest::Client, base: &str, id: &str) -> Value {
    client
        .get(format!("{base}/v1/runs/{id}"))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap()
}

/// `/metrics` counts runs by status and the queue depth from the database, counts the
/// ensemble replicates committed, and renders request latency as a histogram with buckets.
/// The service reads its settings from a TOML file, with an environment variable over it.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_count_runs_by_status_the_queue_and_the_replicates_done() {
    let dir = TempDir::new("metrics");
    let port = free_port();
    let config_file = dir.0.join("demefix.toml");
    std::fs::write(
        &config_file,
        format!(
            "# a test deployment\nbind = \"127.0.0.1:{port}\"\ndb = {:?}\nworkers = 3\n\
             lease_secs = 4\nheartbeat_secs = 1\n",
            dir.0.join("demefix.db").display().to_string()
        ),
    )
    .unwrap();
    let log = dir.0.join("serve.log");
    let serve = serve_with_config_file(&config_file, &log, port, &[("DEMEFIX_WORKERS", "1")]).await;
    let client = reqwest::Client::new();
    let base = serve.base.clone();
    let ready: Value = client
        .get(format!("{base}/readyz"))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    assert_eq!(ready["workers"], 1, "the variable wins over the file");

    let ensemble = post(&client, &base, &ensemble_job(3_000, 500)).await;
    let ensemble = wait_finished(&client, &base, &ensemble, FINISH).await;
    assert_eq!(ensemble["status"], "succeeded", "{ensemble:#}");
    let replicates: u64 = ensemble["results"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["replicates"].as_u64().unwrap())
        .sum();
    assert_eq!(replicates, 4 * 3_000);
    let exact = post(&client, &base, &distinct_small_job("metrics exact", 0.3)).await;
    assert_eq!(
        wait_finished(&client, &base, &exact, FINISH).await["status"],
        "succeeded"
    );

    // One run holds the only worker; two wait behind it, and one of them is cancelled.
    let slow = post(&client, &base, &slow_exact_job()).await;
    let deadline = Instant::now() + FINISH;
    while status_of(&client, &base, &slow).await["status"] != "running" {
        assert!(Instant::now() < deadline, "the slow run never started");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let waiting = post(&client, &base, &distinct_small_job("metrics queued", 0.31)).await;
    let cancelled = post(
        &client,
        &base,
        &distinct_small_job("metrics cancelled", 0.32),
    )
    .await;
    let res = client
        .post(format!("{base}/v1/runs/{cancelled}/cancel"))
        .send()
        .await
        .unwrap();
    assert!(res.status().is_success(), "{}", res.status());

    let res = client.get(format!("{base}/metrics")).send().await.unwrap();
    assert_eq!(res.status(), 200);
    let text = res.text().await.unwrap();
    let slow_status = status_of(&client, &base, &slow).await["status"].clone();
    assert_eq!(
        slow_status, "running",
        "the slow run must outlast the scrape: make it slower"
    );
    assert_eq!(
        status_of(&client, &base, &waiting).await["status"],
        "queued"
    );
    let s = samples(&text);
    let runs = |status: &str| {
        s.get(&format!("demefix_runs{{status=\"{status}\"}}"))
            .copied()
    };
    assert_eq!(runs("queued"), Some(1.0), "{text}");
    assert_eq!(runs("running"), Some(1.0), "{text}");
    assert_eq!(runs("succeeded"), Some(2.0), "{text}");
    assert_eq!(runs("failed"), Some(0.0), "{text}");
    assert_eq!(runs("cancelled"), Some(1.0), "{text}");
    assert_eq!(s.get("demefix_queue_depth"), Some(&1.0), "{text}");
    assert_eq!(
        s.get("demefix_ensemble_replicates_total"),
        Some(&(replicates as f64)),
        "{text}"
    );
    assert!(
        s.get("demefix_ensemble_chunk_replicates_per_second")
            .is_some_and(|r| *r > 0.0),
        "{text}"
    );
    assert!(
        text.contains("# TYPE demefix_ensemble_replicates_total counter"),
        "{text}"
    );
    assert!(
        text.contains("# TYPE demefix_http_request_duration_seconds histogram"),
        "{text}"
    );
    let post_buckets: Vec<&String> = s
        .keys()
        .filter(|k| {
            k.starts_with("demefix_http_request_duration_seconds_bucket{")
                && k.contains("method=\"POST\"")
                && k.contains("route=\"/v1/runs\"")
        })
        .collect();
    assert!(
        post_buckets.iter().any(|k| k.contains("le=\"0.02\"")),
        "a bucket at 20 ms, so p99 can be read against the target: {text}"
    );
    assert!(
        post_buckets.iter().any(|k| k.contains("le=\"+Inf\"")),
        "{text}"
    );
    let posts: f64 = s
        .iter()
        .filter(|(k, _)| {
            k.starts_with("demefix_http_request_duration_seconds_count{")
                && k.contains("method=\"POST\"")
                && k.contains("route=\"/v1/runs\"")
        })
        .map(|(_, v)| v)
        .sum();
    assert_eq!(posts, 5.0, "every POST /v1/runs was timed: {text}");
    // every write on the single writer connection is timed by operation
    let writes = |op: &str| {
        s.get(&format!(
            "demefix_db_write_duration_seconds_count{{op=\"{op}\"}}"
        ))
        .copied()
    };
    assert_eq!(writes("submit"), Some(5.0), "{text}");
    assert_eq!(writes("cancel"), Some(1.0), "{text}");
    assert!(writes("claim").is_some_and(|n| n >= 3.0), "{text}");
    assert!(writes("finish").is_some_and(|n| n >= 2.0), "{text}");
    // the ensemble committed 4 starts x 6 chunks
    assert!(writes("commit_chunk").is_some_and(|n| n >= 24.0), "{text}");
    drop(serve);
}
