//! Promise 11 of the reliability design: the running server matches `openapi.yaml`.
//!
//! Starts `demefix serve` (the binary, as a child process) on a fresh SQLite file, stores a
//! few real records through the API (a matrix, runs of a series, a cancelled run, a
//! verification) so that the operations with path parameters reach real resources, then runs
//! the pinned schemathesis (`tests/openapi/requirements.txt`) against the live server with
//! `openapi.yaml` (the file the server serves at `/openapi.yaml`; loaded from the file so that
//! `GET /openapi.yaml` is one of the operations tested): every check (`--checks all`), every
//! phase (examples, coverage, fuzzing, stateful), a fixed seed and a bounded number of
//! examples per operation. The test fails with schemathesis's report (and the server's log)
//! when any check fails, when the server dies, or when the run takes too long.
//!
//! schemathesis lives in a venv installed by `tests/openapi/install.py` into
//! `$DEMEFIX_SCHEMATHESIS_DIR` (set by `.ci/run`), else into `schemathesis` in this build's
//! target folder. With `CI` set the test only checks that it is there (`.ci/run` installs it)
//! and fails with the reason otherwise; without `CI` it installs it when it is missing, which
//! needs `python3` with venv and pip and access to PyPI.
//!
//! `tests/openapi/schemathesis.toml` holds the settings a check needs on this API, each with
//! its reason, and `tests/openapi/hooks.py` the one case where a check does not apply.
//!
//! Run alone: `cargo test -p demefix --test openapi_conformance -- --nocapture` (15 to 30 s
//! after the build).

#[allow(dead_code)]
#[path = "api/helpers.rs"]
mod helpers;
#[path = "support/outside.rs"]
mod outside;

use helpers::{free_port, spawn_serve, wait_finished, ServeProcess, TempDir};
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::Output;
use std::time::{Duration, Instant};

/// Examples per operation and phase (`--max-examples`): large enough that every operation
/// gets positive and negative cases in each phase, small enough for well under two minutes
/// on two cores. `DEMEFIX_CONFORMANCE_EXAMPLES` overrides it (a deeper run by hand).
const MAX_EXAMPLES: &str = "50";
/// Seed of every generated case (`--seed`), so a failure is reproducible.
/// `DEMEFIX_CONFORMANCE_SEED` overrides it.
const SEED: &str = "20261203";
/// The whole schemathesis run is killed (and the test fails) after this long.
const RUN_LIMIT: Duration = Duration::from_secs(300);
const FINISH: Duration = Duration::from_secs(60);
const SERIES: &str = "conformance";

fn openapi_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/openapi")
}

/// `$DEMEFIX_SCHEMATHESIS_DIR`, else `schemathesis` in the target folder.
fn tools_dir() -> PathBuf {
    outside::fetched_dir("DEMEFIX_SCHEMATHESIS_DIR", "schemathesis")
}

/// The venv's python: checked under CI (where `.ci/run` installs it), else installed when
/// missing (a no-op once done). Fails the test with `install.py`'s message.
fn schemathesis_python() -> PathBuf {
    let under_ci = std::env::var_os("CI").is_some();
    let mut command = std::process::Command::new("python3");
    command
        .arg(openapi_dir().join("install.py"))
        .arg(tools_dir());
    if under_ci {
        command.arg("--check");
    }
    let out = command.output().unwrap_or_else(|e| {
        panic!(
            "tests/openapi_conformance.rs needs `python3` (with venv and pip, to install \
             schemathesis) and could not start it: {e}"
        )
    });
    assert!(
        out.status.success(),
        "{} (exit {:?}). The conformance test cannot run without schemathesis: {}. stderr:\n{}",
        if under_ci {
            "CI is set and schemathesis is not installed"
        } else {
            "tests/openapi/install.py failed"
        },
        out.status.code(),
        if under_ci {
            ".ci/run installs it (python3 tests/openapi/install.py \"$DEMEFIX_SCHEMATHESIS_DIR\")"
        } else {
            "it needs python3 with venv and pip and access to the package registry"
        },
        String::from_utf8_lossy(&out.stderr)
    );
    let path = String::from_utf8(out.stdout).expect("install.py prints a UTF-8 path");
    PathBuf::from(path.trim())
}

/// `demefix serve` on a fresh port and database in `dir`, with limits that keep anything the
/// fuzzer manages to get accepted small: one worker, a small exact state space. Its log goes
/// to `log`.
async fn serve(dir: &TempDir, log: &Path) -> ServeProcess {
    let port = free_port();
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_demefix"));
    command.arg("serve");
    for (name, _) in demefix::config::SETTINGS {
        command.env_remove(name);
    }
    command
        .env_remove(demefix::config::CONFIG_FILE_VAR)
        .env("DEMEFIX_BIND", format!("127.0.0.1:{port}"))
        .env("DEMEFIX_DB", dir.0.join("demefix.db"))
        .env("DEMEFIX_WORKERS", "1")
        .env("DEMEFIX_MAX_STATES", "20000")
        .env("DEMEFIX_LEASE_SECS", "6")
        .env("DEMEFIX_HEARTBEAT_SECS", "2")
        .env("DEMEFIX_NOTIFY_ATTEMPTS", "1")
        .env("RUST_LOG", "warn");
    spawn_serve(command, port, Some(log)).await
}

fn night(as_of: &str, link: f64, method: Value) -> Value {
    json!({
        "label": "conformance seed run",
        "series": SERIES,
        "as_of": as_of,
        "population": {"demes": [{"id": "quay", "size": 4}, {"id": "hill", "size": 3}, {"id": "mill", "size": 3}]},
        "migration": {"orientation": "flows", "matrix": [[0, link, 1], [2, 0, 1], [1, 1, 0]]},
        "dynamics": {"rule": "birth_death", "generation_days": 2.0},
        "selection": {"s": [0.0, 0.2]},
        "start": ["quay", "uniform"],
        "method": method,
        "outputs": {"sensitivity": true, "arrival_fractions": [0.5, 1]}
    })
}

/// What the test stored before the run, for the path and query parameters of
/// `schemathesis.toml` (its `[dictionaries.*]` tables).
struct Seeded {
    runs: Vec<String>,
    check_runs: Vec<String>,
    matrices: Vec<String>,
    dates: Vec<String>,
}

async fn post(client: &reqwest::Client, url: String, body: &Value) -> Value {
    let res = client.post(url).json(body).send().await.expect("answered");
    let status = res.status();
    let doc: Value = res.json().await.expect("a JSON body");
    assert!(status.is_success(), "{status}: {doc:#}");
    doc
}

async fn seed(base: &str) -> Seeded {
    let client = reqwest::Client::new();
    let matrix = post(
        &client,
        format!("{base}/v1/matrices"),
        &json!({"matrix": [[0.8, 0.1, 0.1], [0.2, 0.7, 0.1], [0.1, 0.1, 0.8]]}),
    )
    .await;
    let matrix_hash = matrix["sha256"].as_str().unwrap().to_owned();

    let mut exact = night("2026-01-01", 1.0, json!({"kind": "exact"}));
    exact["interventions"] = json!([
        {"name": "slow-quay", "changes": [{"action": "scale_out_of", "deme": "quay", "factor": 0.5}]}
    ]);
    exact["plan"] = json!({"budget": 0.2, "steps": 2});
    let ensemble = night(
        "2026-01-02",
        3.0,
        json!({"kind": "ensemble", "seed": 7, "replicates": 400, "chunk_size": 200}),
    );
    let by_ref = json!({
        "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 3}, {"id": "c", "size": 2}]},
        "migration": {"orientation": "recruitment", "matrix_ref": matrix["id"]},
        "dynamics": {"rule": "death_birth"},
        "selection": {"s": 0.05},
        "method": {"kind": "approximation"}
    });
    let mut runs = Vec::new();
    for job in [&exact, &ensemble, &by_ref] {
        let run = post(&client, format!("{base}/v1/runs"), job).await;
        let id = run["id"].as_str().unwrap().to_owned();
        let done = wait_finished(&client, base, &id, FINISH).await;
        assert_eq!(done["status"], "succeeded", "{done:#}");
        runs.push(id);
    }
    // A run cancelled while queued or running: its report and cancel answers differ.
    let long = json!({
        "population": {"demes": [{"id": "x", "size": 300}, {"id": "y", "size": 200}]},
        "migration": {"orientation": "dispersal", "matrix": [[0.9, 0.1], [0.2, 0.8]]},
        "dynamics": {"rule": "birth_death"},
        "selection": {"s": 0.0},
        "method": {"kind": "ensemble", "seed": 1, "replicates": 100_000_000, "chunk_size": 1000}
    });
    let run = post(&client, format!("{base}/v1/runs"), &long).await;
    let id = run["id"].as_str().unwrap().to_owned();
    post(&client, format!("{base}/v1/runs/{id}/cancel"), &json!({})).await;
    let done = wait_finished(&client, base, &id, FINISH).await;
    assert_eq!(done["status"], "cancelled", "{done:#}");
    runs.push(id);

    let verification = post(
        &client,
        format!("{base}/v1/runs/{}/verify", runs[0]),
        &json!({}),
    )
    .await;
    let check_run = verification["check_run_id"].as_str().unwrap().to_owned();
    wait_finished(&client, base, &check_run, FINISH).await;

    Seeded {
        runs,
        check_runs: vec![check_run],
        matrices: vec![matrix_hash.clone(), format!("sha256:{matrix_hash}")],
        dates: vec!["2026-01-01".to_owned(), "2026-01-02".to_owned()],
    }
}

/// The variable `name` when set (a whole number), else `default`.
fn setting(name: &str, default: &str) -> String {
    match std::env::var(name) {
        Ok(v) if !v.is_empty() => {
            assert!(
                v.parse::<u64>().is_ok(),
                "{name} must be a whole number, not {v:?}"
            );
            v
        }
        _ => default.to_owned(),
    }
}

fn toml_list(values: &[String]) -> String {
    let quoted: Vec<String> = values.iter().map(|v| format!("{v:?}")).collect();
    format!("[{}]", quoted.join(", "))
}

/// `schemathesis.toml` with the `[dictionaries.*]` tables of what [`seed`] stored.
fn config_text(seeded: &Seeded) -> String {
    let base = std::fs::read_to_string(openapi_dir().join("schemathesis.toml"))
        .expect("read tests/openapi/schemathesis.toml");
    let mut runs_and_dates = seeded.runs.clone();
    runs_and_dates.extend(seeded.dates.iter().cloned());
    format!(
        "{base}\n# Appended by tests/openapi_conformance.rs: what it stored before the run.\n\
         [dictionaries.run_ids]\nvalues = {}\n\n\
         [dictionaries.check_run_ids]\nvalues = {}\n\n\
         [dictionaries.matrix_hashes]\nvalues = {}\n\n\
         [dictionaries.series_names]\nvalues = {}\n\n\
         [dictionaries.series_points]\nvalues = {}\n",
        toml_list(&seeded.runs),
        toml_list(&seeded.check_runs),
        toml_list(&seeded.matrices),
        toml_list(&[SERIES.to_owned()]),
        toml_list(&runs_and_dates),
    )
}

/// `text` with every line cut to 2,000 characters (a failing case can carry a body of
/// megabytes, which schemathesis prints in its `curl` line).
fn cut_lines(text: &str) -> String {
    text.lines()
        .map(|line| match line.char_indices().nth(2_000) {
            Some((at, _)) => format!("{} [... {} bytes cut]", &line[..at], line.len() - at),
            None => line.to_owned(),
        })
        .collect::<Vec<_>>()
        .join("\n")
}

fn report(out: &Output, log: &Path) -> String {
    format!(
        "schemathesis exit {:?}\n--- stdout ---\n{}\n--- stderr ---\n{}\n--- server log ---\n{}",
        out.status.code(),
        cut_lines(&String::from_utf8_lossy(&out.stdout)),
        cut_lines(&String::from_utf8_lossy(&out.stderr)),
        cut_lines(&std::fs::read_to_string(log).unwrap_or_default())
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_live_server_matches_openapi_yaml_under_every_schemathesis_check() {
    let python = schemathesis_python();
    let dir = TempDir::new("openapi");
    let log = dir.0.join("serve.log");
    let mut server = serve(&dir, &log).await;
    let seeded = seed(&server.base).await;
    let config = dir.0.join("schemathesis.toml");
    std::fs::write(&config, config_text(&seeded)).expect("write the run's configuration");

    let started = Instant::now();
    let mut command = tokio::process::Command::new(&python);
    command
        .current_dir(&dir.0)
        .env("SCHEMATHESIS_HOOKS", openapi_dir().join("hooks.py"))
        .env("NO_COLOR", "1")
        // No __pycache__ beside hooks.py in the source tree; no proxy for the loopback.
        .env("PYTHONDONTWRITEBYTECODE", "1")
        .env("NO_PROXY", "127.0.0.1")
        .env("no_proxy", "127.0.0.1")
        .args(["-m", "schemathesis.cli", "--config-file"])
        .arg(&config)
        .arg("run")
        .arg(PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("openapi.yaml"))
        .args(["--url", &server.base])
        .args(["--checks", "all"])
        .args(["--phases", "examples,coverage,fuzzing,stateful"])
        .args([
            "--max-examples",
            &setting("DEMEFIX_CONFORMANCE_EXAMPLES", MAX_EXAMPLES),
        ])
        .args(["--seed", &setting("DEMEFIX_CONFORMANCE_SEED", SEED)])
        .args(["--workers", "1", "--generation-database", "none"])
        .args(["--continue-on-failure", "--no-color"])
        .args(["--request-timeout", "30"])
        .kill_on_drop(true);
    // Every request and response of the run, for a look by hand.
    if let Some(dir) = std::env::var_os("DEMEFIX_CONFORMANCE_REPORT_DIR") {
        command
            .args(["--report", "ndjson,html", "--report-dir"])
            .arg(dir);
    }
    let out = tokio::time::timeout(RUN_LIMIT, command.output())
        .await
        .unwrap_or_else(|_| panic!("schemathesis did not finish within {RUN_LIMIT:?}"))
        .expect("start schemathesis");
    let took = started.elapsed();
    let alive = server
        .process
        .try_wait()
        .expect("poll the server")
        .is_none();
    let text = report(&out, &log);
    assert!(alive, "the server died during the run:\n{text}");
    assert!(
        out.status.success(),
        "schemathesis found mismatches:\n{text}"
    );
    let stdout = String::from_utf8_lossy(&out.stdout);
    let every = demefix::http::ROUTES.len();
    assert!(
        stdout.contains(&format!("Tested: {every}\n")),
        "schemathesis did not test all {every} operations:\n{text}"
    );
    println!("{stdout}\nschemathesis took {took:.1?}");
}
