//! The client commands (`demefix submit`, `get`, `report`) as child processes against the
//! real service on a fresh SQLite file and a real socket, and completion notifications
//! (`notify_url`) delivered to a receiver on loopback.

#[allow(dead_code)]
#[path = "api/helpers.rs"]
mod helpers;

use demefix::config::{Config, RawConfig};
use demefix::server;
use helpers::{
    error_pointers, free_port, small_job, spawn_app_with, test_raw_config, wait_finished, TempDir,
    TestApp,
};
use serde_json::{json, Value};
use std::process::Output;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpListener;

const FINISH: Duration = Duration::from_secs(60);

/// Runs the `demefix` binary with `args` (and `stdin`), without blocking the runtime the
/// service runs on.
async fn demefix(args: &[&str], stdin: Option<&[u8]>) -> Output {
    demefix_with_url_var(args, stdin, None).await
}

/// [`demefix`] with `DEMEFIX_URL` set to `url` (removed when `None`).
async fn demefix_with_url_var(args: &[&str], stdin: Option<&[u8]>, url: Option<&str>) -> Output {
    let mut command = tokio::process::Command::new(env!("CARGO_BIN_EXE_demefix"));
    match url {
        Some(url) => command.env("DEMEFIX_URL", url),
        None => command.env_remove("DEMEFIX_URL"),
    };
    command
        .args(args)
        .stdin(if stdin.is_some() {
            std::process::Stdio::piped()
        } else {
            std::process::Stdio::null()
        })
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped());
    let mut child = command.spawn().expect("the binary starts");
    if let Some(bytes) = stdin {
        let mut input = child.stdin.take().unwrap();
        input.write_all(bytes).await.unwrap();
        drop(input);
    }
    tokio::time::timeout(FINISH, child.wait_with_output())
        .await
        .expect("the binary finishes in time")
        .expect("the binary runs")
}

fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).into_owned()
}

/// A job file in `dir`.
fn job_file(dir: &TempDir, name: &str, job: &Value) -> String {
    let path = dir.0.join(name);
    std::fs::write(&path, job.to_string()).unwrap();
    path.display().to_string()
}

/// A service whose notifications retry after 50 ms (doubling).
async fn fast_notifying_app() -> TestApp {
    spawn_app_with(|raw| raw.notify_backoff_ms = Some("50".to_owned())).await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn submit_wait_prints_the_finished_run_and_get_prints_it_again() {
    let app = spawn_app_with(|_| {}).await;
    let dir = TempDir::new("client");
    let file = job_file(&dir, "job.json", &small_job());
    let out = demefix(&["submit", &file, "--wait", "--url", &app.base], None).await;
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let doc: Value = serde_json::from_slice(&out.stdout).expect("the run document on stdout");
    assert_eq!(doc["status"], "succeeded", "{doc:#}");
    assert_eq!(doc["results"].as_array().unwrap().len(), 2);
    let id = doc["id"].as_str().unwrap().to_owned();
    let log = stderr(&out);
    assert!(log.contains(&format!("submitted run {id}")), "{log}");
    assert!(log.contains("not forecasts"), "{log}");

    // The document on stdout is the one the service serves.
    let served = app
        .get(&format!("/v1/runs/{id}"))
        .await
        .bytes()
        .await
        .unwrap();
    assert_eq!(out.stdout, [&served[..], b"\n"].concat());
    let got = demefix(&["get", &id, "--url", &app.base], None).await;
    assert_eq!(got.status.code(), Some(0), "{}", stderr(&got));
    assert_eq!(got.stdout, out.stdout);

    // Without --wait: the id and the Location, at once; the job read from stdin; the
    // service named by DEMEFIX_URL.
    let mut other = small_job();
    other["selection"]["s"] = json!([0.2]);
    let quick = demefix_with_url_var(
        &["submit", "-", "--idempotency-key", "nightly-1"],
        Some(other.to_string().as_bytes()),
        Some(&app.base),
    )
    .await;
    assert_eq!(quick.status.code(), Some(0), "{}", stderr(&quick));
    let text = String::from_utf8(quick.stdout).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), 2, "{text}");
    assert_eq!(lines[1], format!("{}/v1/runs/{}", app.base, lines[0]));
    let run = app.get_json(&format!("/v1/runs/{}", lines[0])).await;
    assert_eq!(run["spec"]["selection"]["s"], json!([0.2]));
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_rejected_job_exits_2_with_every_pointer_and_an_absent_service_exits_3() {
    let app = spawn_app_with(|_| {}).await;
    let mut bad = small_job();
    bad["selection"]["s"] = json!([-2]);
    bad["notify_url"] = json!("https://hooks.example.org/done");
    let dir = TempDir::new("client");
    let file = job_file(&dir, "bad.json", &bad);
    let out = demefix(&["submit", &file, "--wait", "--url", &app.base], None).await;
    assert_eq!(out.status.code(), Some(2), "{}", stderr(&out));
    assert!(out.stdout.is_empty());
    let log = stderr(&out);
    assert!(
        log.contains("the service rejected the job: 422 Invalid job"),
        "{log}"
    );
    assert!(log.contains("\n  /selection/s/0: "), "{log}");
    assert!(log.contains("\n  /notify_url: "), "{log}");
    assert!(log.contains("no TLS client"), "{log}");
    assert_eq!(app.stored_runs().await, 0);

    let absent = format!("http://127.0.0.1:{}", free_port());
    let out = demefix(&["submit", &file, "--url", &absent], None).await;
    assert_eq!(out.status.code(), Some(3), "{}", stderr(&out));
    assert!(
        stderr(&out).contains("cannot reach the service"),
        "{}",
        stderr(&out)
    );
    let out = demefix(
        &[
            "get",
            "0193b4b2-0000-7000-8000-000000000000",
            "--url",
            &absent,
        ],
        None,
    )
    .await;
    assert_eq!(out.status.code(), Some(3), "{}", stderr(&out));
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn get_and_report_of_an_unknown_run_say_so_and_exit_6() {
    let app = spawn_app_with(|_| {}).await;
    let dir = TempDir::new("client");
    let unknown = "0193b4b2-0000-7000-8000-000000000000";
    let out = demefix(&["get", unknown, "--url", &app.base], None).await;
    assert_eq!(out.status.code(), Some(6), "{}", stderr(&out));
    assert!(stderr(&out).contains("404 Not found"), "{}", stderr(&out));

    let file = dir.0.join("report.html");
    let file_arg = file.display().to_string();
    let out = demefix(
        &["report", unknown, "--out", &file_arg, "--url", &app.base],
        None,
    )
    .await;
    assert_eq!(out.status.code(), Some(6), "{}", stderr(&out));
    let log = stderr(&out);
    assert!(
        log.contains(&format!("GET /v1/runs/{unknown}/report: 404 Not found")),
        "{log}"
    );
    assert!(!file.exists(), "nothing is written for an error");
    assert_eq!(std::fs::read_dir(&dir.0).unwrap().count(), 0);
    app.stop().await;
}

/// What the receiver saw of one request.
#[derive(Debug, Clone)]
struct Received {
    head: String,
    body: Vec<u8>,
    answered: u16,
}

/// A receiver of notifications on loopback: answers each request with the next status of
/// `statuses` (the last one repeats) and records what it got.
struct Receiver {
    url: String,
    seen: Arc<Mutex<Vec<Received>>>,
    task: tokio::task::JoinHandle<()>,
}

impl Receiver {
    async fn start(statuses: Vec<u16>) -> Self {
        let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
        Self::on(listener, statuses)
    }

    fn on(listener: TcpListener, statuses: Vec<u16>) -> Self {
        let url = format!(
            "http://{}/hooks/demefix?pipeline=nightly",
            listener.local_addr().unwrap()
        );
        let seen = Arc::new(Mutex::new(Vec::new()));
        let log = seen.clone();
        let task = tokio::spawn(async move {
            loop {
                let Ok((mut socket, _)) = listener.accept().await else {
                    return;
                };
                let mut raw = Vec::new();
                let mut buf = [0u8; 4096];
                let (head, body) = loop {
                    let n = socket.read(&mut buf).await.unwrap_or(0);
                    if n == 0 {
                        break (String::from_utf8_lossy(&raw).into_owned(), Vec::new());
                    }
                    raw.extend_from_slice(&buf[..n]);
                    let text = String::from_utf8_lossy(&raw).into_owned();
                    if let Some(end) = text.find("\r\n\r\n") {
                        let head = text[..end].to_owned();
                        let length = head
                            .lines()
                            .find_map(|l| {
                                let (n, v) = l.split_once(':')?;
                                n.eq_ignore_ascii_case("content-length")
                                    .then(|| v.trim().parse::<usize>().ok())?
                            })
                            .unwrap_or(0);
                        if raw.len() >= end + 4 + length {
                            break (head, raw[end + 4..end + 4 + length].to_vec());
                        }
                    }
                };
                let answered = {
                    let mut log = log.lock().unwrap();
                    let status = statuses
                        .get(log.len())
                        .or(statuses.last())
                        .copied()
                        .unwrap_or(200);
                    log.push(Received {
                        head,
                        body,
                        answered: status,
                    });
                    status
                };
                let answer = format!(
                    "HTTP/1.1 {answered} X\r\ncontent-length: 7\r\nconnection: close\r\n\r\nanswer!"
                );
                let _ = socket.write_all(answer.as_bytes()).await;
            }
        });
        Self { url, seen, task }
    }

    fn seen(&self) -> Vec<Received> {
        self.seen.lock().unwrap().clone()
    }
}

impl Drop for Receiver {
    fn drop(&mut self) {
        self.task.abort();
    }
}

/// Polls the run until its notification is in `state` and returns the run document.
async fn wait_notification(base: &str, id: &str, state: &str) -> Value {
    wait_notification_until(base, id, |n| n["state"] == state).await
}

/// Polls the run until `done` holds for its `notification` and returns the run document.
async fn wait_notification_until(base: &str, id: &str, done: impl Fn(&Value) -> bool) -> Value {
    let client = reqwest::Client::new();
    let deadline = Instant::now() + FINISH;
    loop {
        let run: Value = client
            .get(format!("{base}/v1/runs/{id}"))
            .send()
            .await
            .unwrap()
            .json()
            .await
            .unwrap();
        if done(&run["notification"]) {
            return run;
        }
        assert!(
            Instant::now() < deadline,
            "notification still {:#}",
            run["notification"]
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

/// `POST /v1/runs/{id}/cancel`, expecting it to be accepted.
async fn cancel(app: &TestApp, id: &str) {
    let res = app
        .client
        .post(app.url(&format!("/v1/runs/{id}/cancel")))
        .send()
        .await
        .unwrap();
    assert!([200, 202].contains(&res.status().as_u16()));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_notification_is_retried_after_two_500s_and_delivered_once() {
    let app = fast_notifying_app().await;
    let receiver = Receiver::start(vec![500, 500, 200]).await;
    let mut job = small_job();
    job["notify_url"] = json!(receiver.url);
    let res = app.post_job(&job).await;
    assert_eq!(res.status(), 202);
    let run: Value = res.json().await.unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    assert!(
        ["waiting", "pending"].contains(&run["notification"]["state"].as_str().unwrap()),
        "{:#}",
        run["notification"]
    );
    assert_eq!(run["notification"]["url"], receiver.url.as_str());
    assert!(
        run["spec"].get("notify_url").is_none(),
        "not part of the spec"
    );

    let done = wait_notification(&app.base, &id, "delivered").await;
    assert_eq!(done["status"], "succeeded");
    let n = &done["notification"];
    assert_eq!(n["attempts"], 3, "{n:#}");
    assert!(n["delivered_at"].is_string(), "{n:#}");
    assert!(n.get("next_attempt_at").is_none(), "{n:#}");
    assert!(
        n["last_error"].as_str().unwrap().contains("answered 500"),
        "{n:#}"
    );
    // Nothing more arrives once delivered.
    tokio::time::sleep(Duration::from_millis(400)).await;
    let seen = receiver.seen();
    let statuses: Vec<u16> = seen.iter().map(|r| r.answered).collect();
    assert_eq!(statuses, [500, 500, 200]);
    for r in &seen {
        assert!(
            r.head
                .starts_with("POST /hooks/demefix?pipeline=nightly HTTP/1.1\r\n"),
            "{}",
            r.head
        );
        assert!(
            r.head
                .to_ascii_lowercase()
                .contains("\r\ncontent-type: application/json\r\n"),
            "{}",
            r.head
        );
        let notice: Value = serde_json::from_slice(&r.body).unwrap();
        assert_eq!(
            notice,
            json!({
                "run_id": id, "status": "succeeded", "run_url": format!("/v1/runs/{id}"),
                "finished_at": done["finished_at"]
            })
        );
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_notification_that_never_gets_a_2xx_is_recorded_as_failed() {
    let app = spawn_app_with(|raw| {
        raw.notify_backoff_ms = Some("20".to_owned());
        raw.notify_attempts = Some("3".to_owned());
    })
    .await;
    let receiver = Receiver::start(vec![503]).await;
    let mut job = small_job();
    job["notify_url"] = json!(receiver.url);
    let run: Value = app.post_job(&job).await.json().await.unwrap();
    let id = run["id"].as_str().unwrap();
    let done = wait_notification(&app.base, id, "failed").await;
    let n = &done["notification"];
    assert_eq!(n["attempts"], 3, "{n:#}");
    assert!(
        n["failed_at"].is_string() && n.get("delivered_at").is_none(),
        "{n:#}"
    );
    assert_eq!(n["last_error"], "answered 503: answer!");
    tokio::time::sleep(Duration::from_millis(200)).await;
    assert_eq!(receiver.seen().len(), 3);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_pending_notification_survives_a_restart_and_is_delivered_by_the_next_start() {
    let dir = TempDir::new("client-restart");
    let config = || {
        let mut raw: RawConfig = test_raw_config(&dir);
        raw.notify_backoff_ms = Some("100".to_owned());
        Config::from_raw(&raw).unwrap()
    };
    // Nothing listens on the receiver's port yet: the first attempt is refused.
    let port = free_port();
    let url = format!("http://127.0.0.1:{port}/hooks/demefix?pipeline=nightly");
    let first = server::start(config()).await.unwrap();
    let base = format!("http://{}", first.addr);
    let mut job = small_job();
    job["notify_url"] = json!(url);
    let client = reqwest::Client::new();
    let run: Value = client
        .post(format!("{base}/v1/runs"))
        .json(&job)
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    let pending = wait_notification_until(&base, &id, |n| {
        n["state"] == "pending" && n["attempts"].as_u64() > Some(0)
    })
    .await;
    first.stop().await;
    let attempts_before = pending["notification"]["attempts"].as_u64().unwrap();
    assert!(attempts_before >= 1);

    let receiver = Receiver::on(
        TcpListener::bind(("127.0.0.1", port)).await.unwrap(),
        vec![200],
    );
    let second = server::start(config()).await.unwrap();
    let base = format!("http://{}", second.addr);
    let done = wait_notification(&base, &id, "delivered").await;
    let n = &done["notification"];
    assert!(
        n["attempts"].as_u64().unwrap() > attempts_before,
        "{n:#} after {attempts_before}"
    );
    assert!(
        n["last_error"].as_str().unwrap().contains("cannot connect"),
        "{n:#}"
    );
    assert_eq!(receiver.seen().len(), 1);
    second.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_cancelled_run_notifies_too() {
    let app = fast_notifying_app().await;
    let receiver = Receiver::start(vec![204]).await;
    let mut job = helpers::ensemble_job(5_000_000, 1_000);
    job["notify_url"] = json!(receiver.url);
    let run: Value = app.post_job(&job).await.json().await.unwrap();
    let id = run["id"].as_str().unwrap().to_owned();
    cancel(&app, &id).await;
    let done = wait_notification(&app.base, &id, "delivered").await;
    assert_eq!(done["status"], "cancelled");
    let seen = receiver.seen();
    assert_eq!(seen.len(), 1);
    let notice: Value = serde_json::from_slice(&seen[0].body).unwrap();
    assert_eq!(notice["status"], "cancelled");
    assert_eq!(notice["finished_at"], done["finished_at"]);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn notify_url_is_checked_at_its_pointer_and_stays_out_of_the_spec_hash() {
    let app = fast_notifying_app().await;
    let mut https = small_job();
    https["notify_url"] = json!("https://hooks.example.org/done");
    let res = app.post_job(&https).await;
    assert_eq!(res.status(), 422);
    let problem: Value = res.json().await.unwrap();
    assert_eq!(error_pointers(&problem), ["/notify_url"]);
    assert!(
        problem["errors"][0]["detail"]
            .as_str()
            .unwrap()
            .contains("the service has no TLS client"),
        "{problem:#}"
    );
    assert_eq!(app.stored_runs().await, 0);

    // Two jobs that differ only in notify_url: one spec hash, and the second is answered
    // by reuse (and still notifies its own receiver).
    let receiver_a = Receiver::start(vec![200]).await;
    let receiver_b = Receiver::start(vec![200]).await;
    let mut a = small_job();
    a["notify_url"] = json!(receiver_a.url);
    let mut b = small_job();
    b["notify_url"] = json!(receiver_b.url);
    let first = app.succeeded(&a, FINISH).await;
    let second = app.succeeded(&b, FINISH).await;
    assert_eq!(
        first["provenance"]["spec_sha256"],
        second["provenance"]["spec_sha256"]
    );
    assert_eq!(first["spec"], second["spec"]);
    assert_ne!(
        first["provenance"]["request_sha256"], second["provenance"]["request_sha256"],
        "the stored request keeps notify_url"
    );
    assert_eq!(second["reused_from"], first["id"]);
    let second_id = second["id"].as_str().unwrap();
    wait_notification(&app.base, second_id, "delivered").await;
    assert_eq!(receiver_b.seen().len(), 1);
    let notice: Value = serde_json::from_slice(&receiver_b.seen()[0].body).unwrap();
    assert_eq!(notice["run_id"], second_id);
    let first_again = wait_finished(
        &app.client,
        &app.base,
        first["id"].as_str().unwrap(),
        FINISH,
    )
    .await;
    assert_eq!(first_again["notification"]["url"], receiver_a.url.as_str());
    // A job without notify_url has no notification member.
    let mut none = small_job();
    none["selection"]["s"] = json!([0.3]);
    let run = app.succeeded(&none, FINISH).await;
    assert!(run.get("notification").is_none(), "{run:#}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn submit_wait_on_a_run_cancelled_meanwhile_prints_it_and_exits_5() {
    let app = spawn_app_with(|_| {}).await;
    let dir = TempDir::new("client");
    let file = job_file(&dir, "long.json", &helpers::ensemble_job(5_000_000, 1_000));
    let waiting = {
        let file = file.clone();
        let base = app.base.clone();
        tokio::spawn(async move {
            demefix(
                &["submit", &file, "--wait", "--quiet", "--url", &base],
                None,
            )
            .await
        })
    };
    let deadline = Instant::now() + FINISH;
    let id = loop {
        let page = app.get_json("/v1/runs").await;
        if let Some(id) = page["runs"][0]["id"].as_str() {
            break id.to_owned();
        }
        assert!(Instant::now() < deadline, "the submission never arrived");
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    cancel(&app, &id).await;
    let out = waiting.await.unwrap();
    assert_eq!(out.status.code(), Some(5), "{}", stderr(&out));
    assert!(out.stderr.is_empty(), "--quiet: {}", stderr(&out));
    let doc: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(
        (doc["id"].as_str(), doc["status"].as_str()),
        (Some(id.as_str()), Some("cancelled"))
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn verify_and_changes_from_the_command_line() {
    let app = spawn_app_with(|_| {}).await;
    let dir = TempDir::new("client-nights");
    let mut ids = Vec::new();
    for (night, flow) in [("2026-11-30", 4), ("2026-12-01", 9)] {
        let mut job = small_job();
        job["series"] = json!("cli-nights");
        job["as_of"] = json!(night);
        job["migration"]["matrix"][0][1] = json!(flow);
        let file = job_file(&dir, &format!("{night}.json"), &job);
        let out = demefix(
            &["submit", &file, "--wait", "--quiet", "--url", &app.base],
            None,
        )
        .await;
        assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
        let doc: Value = serde_json::from_slice(&out.stdout).unwrap();
        ids.push(doc["id"].as_str().unwrap().to_owned());
    }

    let out = demefix(
        &[
            "changes",
            "cli-nights",
            "--threshold",
            "0.5",
            "--url",
            &app.base,
        ],
        None,
    )
    .await;
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let report: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(report["from"]["run_id"], ids[0].as_str());
    assert_eq!(report["to"]["run_id"], ids[1].as_str());
    assert_eq!(report["threshold"], 0.5);
    assert_eq!(report["matrix_changes"]["entries"][0]["change"], 5.0);
    assert_eq!(report["rows"].as_array().unwrap().len(), 2);

    let out = demefix(&["verify", &ids[1], "--wait", "--url", &app.base], None).await;
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let verification: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(verification["status"], "identical", "{verification:#}");
    assert_eq!(verification["run_id"], ids[1].as_str());

    let unknown = demefix(
        &[
            "verify",
            "01890000-0000-7000-8000-000000000000",
            "--url",
            &app.base,
        ],
        None,
    )
    .await;
    assert_eq!(unknown.status.code(), Some(6), "{}", stderr(&unknown));
    let no_series = demefix(&["changes", "no-such-series", "--url", &app.base], None).await;
    assert_eq!(no_series.status.code(), Some(6), "{}", stderr(&no_series));
    app.stop().await;
}
