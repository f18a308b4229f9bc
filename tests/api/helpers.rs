//! Shared set-up of the API tests: a service on port 0 with a fresh SQLite file in its own
//! temporary directory, a `reqwest` client, job documents, and polling.

use demefix::config::{Config, RawConfig};
use demefix::server::{self, Running};
use serde_json::{json, Value};
use std::path::PathBuf;
use std::time::{Duration, Instant};

/// A fresh directory under the system temp dir, removed on drop.
pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(tag: &str) -> Self {
        let dir = std::env::temp_dir().join(format!("demefix-{tag}-{}", uuid::Uuid::now_v7()));
        std::fs::create_dir_all(&dir).expect("create a temp dir");
        Self(dir)
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// A running service and a client for it.
pub struct TestApp {
    pub base: String,
    pub client: reqwest::Client,
    pub running: Option<Running>,
    _dir: TempDir,
}

/// Configuration of a test service: port 0, a database in `dir`, short leases.
pub fn test_raw_config(dir: &TempDir) -> RawConfig {
    RawConfig {
        bind: Some("127.0.0.1:0".to_owned()),
        db: Some(dir.0.join("demefix.db").display().to_string()),
        workers: Some("2".to_owned()),
        lease_secs: Some("3".to_owned()),
        heartbeat_secs: Some("1".to_owned()),
        ..RawConfig::default()
    }
}

/// Starts a service with `edit` applied to the test configuration.
pub async fn spawn_app_with(edit: impl FnOnce(&mut RawConfig)) -> TestApp {
    let dir = TempDir::new("api");
    let mut raw = test_raw_config(&dir);
    edit(&mut raw);
    let config = Config::from_raw(&raw).expect("test configuration is valid");
    let running = server::start(config).await.expect("the service starts");
    TestApp {
        base: format!("http://{}", running.addr),
        client: reqwest::Client::new(),
        running: Some(running),
        _dir: dir,
    }
}

/// Starts a service with the test configuration.
pub async fn spawn_app() -> TestApp {
    spawn_app_with(|_| {}).await
}

impl TestApp {
    /// The service's SQLite file.
    pub fn db_path(&self) -> PathBuf {
        self._dir.0.join("demefix.db")
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    /// `POST /v1/runs` with `body` as sent.
    pub async fn post_raw(&self, body: Vec<u8>, key: Option<&str>) -> reqwest::Response {
        let mut req = self
            .client
            .post(self.url("/v1/runs"))
            .header("content-type", "application/json")
            .body(body);
        if let Some(k) = key {
            req = req.header("Idempotency-Key", k);
        }
        req.send().await.expect("the request is answered")
    }

    pub async fn post_job(&self, job: &Value) -> reqwest::Response {
        self.post_raw(job.to_string().into_bytes(), None).await
    }

    pub async fn get(&self, path: &str) -> reqwest::Response {
        self.client
            .get(self.url(path))
            .send()
            .await
            .expect("the request is answered")
    }

    /// `GET path`, its body read as JSON.
    pub async fn get_json(&self, path: &str) -> Value {
        self.get(path).await.json().await.expect("a JSON body")
    }

    /// Number of stored runs, read from the database.
    pub async fn stored_runs(&self) -> i64 {
        self.running
            .as_ref()
            .expect("running")
            .store
            .count_runs()
            .await
            .expect("count runs")
    }

    /// Polls `GET /v1/runs/{id}` until the run is finished.
    pub async fn wait_finished(&self, id: &str, limit: Duration) -> Value {
        wait_finished(&self.client, &self.base, id, limit).await
    }

    /// Posts `job` (expecting 202) and returns the run once it has succeeded.
    pub async fn succeeded(&self, job: &Value, limit: Duration) -> Value {
        let res = self.post_job(job).await;
        assert_eq!(res.status(), 202);
        let run: Value = res.json().await.expect("a JSON body");
        let done = self.wait_finished(run["id"].as_str().unwrap(), limit).await;
        assert_eq!(done["status"], "succeeded", "{done:#}");
        done
    }

    /// Stops the service but keeps its files (until `self` is dropped).
    pub async fn stop_keeping_files(&mut self) {
        if let Some(r) = self.running.take() {
            r.stop().await;
        }
    }

    pub async fn stop(mut self) {
        if let Some(r) = self.running.take() {
            r.stop().await;
        }
    }
}

/// Polls `base/v1/runs/{id}` until the run is finished.
pub async fn wait_finished(
    client: &reqwest::Client,
    base: &str,
    id: &str,
    limit: Duration,
) -> Value {
    let deadline = Instant::now() + limit;
    loop {
        let res = client.get(format!("{base}/v1/runs/{id}")).send().await;
        if let Ok(res) = res {
            if res.status() == 200 {
                let run: Value = res.json().await.expect("a run document");
                let status = run["status"].as_str().unwrap_or_default().to_owned();
                if ["succeeded", "failed", "cancelled"].contains(&status.as_str()) {
                    return run;
                }
            }
        }
        assert!(
            Instant::now() < deadline,
            "run {id} did not finish within {limit:?}"
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// A small exact job (three demes, a few hundred states).
/// The `pointer` of every entry of a problem document's `errors`, in order.
pub fn error_pointers(doc: &Value) -> Vec<&str> {
    doc["errors"]
        .as_array()
        .expect("an errors array")
        .iter()
        .map(|e| e["pointer"].as_str().expect("a pointer"))
        .collect()
}

pub fn small_job() -> Value {
    json!({
        "series": "api-tests",
        "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 4}, {"id": "c", "size": 2}]},
        "migration": {"orientation": "flows", "matrix": [[0, 4, 1], [3, 0, 2], [1, 1, 0]]},
        "dynamics": {"rule": "death_birth"},
        "selection": {"s": [0.1]},
        "start": ["a", "uniform"],
        "method": {"kind": "auto", "seed": 11}
    })
}

/// An ensemble job of `replicates` replicates in chunks of `chunk`.
pub fn ensemble_job(replicates: u64, chunk: u64) -> Value {
    json!({
        "population": {"demes": [{"id": "x", "size": 30}, {"id": "y", "size": 20}]},
        "migration": {"orientation": "dispersal", "matrix": [[0.9, 0.1], [0.2, 0.8]]},
        "dynamics": {"rule": "birth_death", "generation_days": 2.0},
        "selection": {"s": [0.0, 0.2]},
        "start": ["y", "uniform"],
        "method": {"kind": "ensemble", "seed": 5, "replicates": replicates, "chunk_size": chunk},
        "outputs": {"arrival_fractions": [0.5, 1]}
    })
}

/// A free local port (bound and released at once).
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// A `demefix serve` child process, killed on drop (a failing test leaves none behind).
pub struct ServeProcess {
    pub process: std::process::Child,
    pub base: String,
}

impl Drop for ServeProcess {
    fn drop(&mut self) {
        let _ = self.process.kill();
        let _ = self.process.wait();
    }
}

/// Spawns `command` (a `demefix serve` listening on `port`, stdout discarded) and waits until
/// `/readyz` answers 200; `log` is where its stderr goes, printed if it never gets ready.
pub async fn spawn_serve(
    mut command: std::process::Command,
    port: u16,
    log: Option<&std::path::Path>,
) -> ServeProcess {
    command.stdout(std::process::Stdio::null());
    match log {
        Some(path) => command.stderr(std::fs::File::create(path).expect("create the log file")),
        None => command.stderr(std::process::Stdio::null()),
    };
    let mut serve = ServeProcess {
        process: command.spawn().expect("spawn demefix serve"),
        base: format!("http://127.0.0.1:{port}"),
    };
    let read_log = || log.map(|p| std::fs::read_to_string(p).unwrap_or_default());
    let client = reqwest::Client::new();
    let mut last = String::from("no answer");
    for _ in 0..1_200 {
        match client.get(format!("{}/readyz", serve.base)).send().await {
            Ok(r) if r.status() == 200 => return serve,
            Ok(r) => last = format!("{}: {}", r.status(), r.text().await.unwrap_or_default()),
            Err(e) => last = e.to_string(),
        }
        if let Ok(Some(exit)) = serve.process.try_wait() {
            panic!(
                "demefix serve exited ({exit:?}):\n{}",
                read_log().unwrap_or_default()
            );
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!(
        "demefix serve did not become ready (last /readyz: {last}):\n{}",
        read_log().unwrap_or_default()
    );
}
