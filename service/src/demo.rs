//! `demefix demo`: the whole service on one machine, in one process, in well under a minute.
//!
//! This module owns the demo: it starts the service ([`crate::server::start`]) on a free port
//! of 127.0.0.1 with a fresh SQLite file, posts the demo scenario ([`SCENARIO_PATH`], compiled
//! in) once per update rule of [`RULES`] over real HTTP, shows progress read from
//! `GET /v1/runs/{id}` while the runs compute, stops the service, and prints a table of the
//! results (rule, `s`, start deme, fixation probability with its 95% interval, the well-mixed
//! reference and the ratio to it, mean fixation time), the run ids, where the database is, and
//! the standing caution.
//!
//! The client side is the minimal HTTP/1.1 client of [`crate::http_client`] (one request per
//! connection, JSON bodies); the only HTTP client crate in the tree (reqwest) is a
//! dev-dependency, and a loopback JSON API needs nothing more.

use crate::config::{Config, RawConfig};
use crate::http_client;
use crate::server::{self, StartError};
use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};
use serde_json::Value;
use std::io::{IsTerminal, Write};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// Where the demo scenario lives in the repository (the README points to it).
pub const SCENARIO_PATH: &str = "examples/ferry-islands-ensemble.json";

/// The demo scenario: a fictional archipelago of five islands with invented ferry flows, a
/// seeded ensemble for a sweep of three values of `s` and three starts.
pub const SCENARIO: &str = include_str!("../../examples/ferry-islands-ensemble.json");

/// The update rules the scenario is posted with, one run each (`dynamics.rule` is replaced).
pub const RULES: [&str; 2] = ["death_birth", "birth_death"];

/// How long the demo waits for its runs before giving up.
pub const TIME_LIMIT: Duration = Duration::from_secs(600);

/// Interval between polls of a run's progress.
const POLL_INTERVAL: Duration = Duration::from_millis(200);

/// What `demefix demo` was asked to do.
#[derive(Debug, Clone, Default)]
pub struct DemoOptions {
    /// The SQLite file to create; `None` makes a new directory under the system temp dir.
    pub db: Option<PathBuf>,
    /// Worker slots and compute threads of the service (`None`: all cores).
    pub workers: Option<usize>,
    /// Replicates per row instead of the scenario's.
    pub replicates: Option<u64>,
    /// Delete the database (and the directory the demo made for it) once the table is out.
    pub discard: bool,
    /// Nothing on stderr: no progress, no status lines.
    pub quiet: bool,
}

/// Why the demo did not complete.
#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    /// The database named with `--db` is already there.
    #[error(
        "{0} already exists; the demo starts from a fresh database (remove it or name another)"
    )]
    DatabaseExists(PathBuf),
    /// The database's directory could not be made.
    #[error("cannot prepare the directory {path}: {source}")]
    Directory {
        /// The directory.
        path: PathBuf,
        /// Cause.
        source: std::io::Error,
    },
    /// The compiled-in scenario is not a job document (a build defect).
    #[error("the demo scenario {SCENARIO_PATH} is not usable: {0}")]
    Scenario(String),
    /// The async runtime could not be built.
    #[error("cannot start the async runtime: {0}")]
    Runtime(std::io::Error),
    /// The service did not start.
    #[error(transparent)]
    Start(#[from] StartError),
    /// An HTTP exchange with the service failed.
    #[error("HTTP exchange with the service failed: {0}")]
    Http(#[from] http_client::HttpError),
    /// The service answered something the demo did not expect.
    #[error("{request} answered {status}: {body}")]
    Unexpected {
        /// Method and path.
        request: String,
        /// HTTP status.
        status: u16,
        /// The body, as text.
        body: String,
    },
    /// A run ended without results.
    #[error("run {id} ({rule}) ended `{status}`: {error}")]
    RunEnded {
        /// Run id.
        id: String,
        /// Update rule of the run.
        rule: &'static str,
        /// Final status.
        status: String,
        /// The run's `error`, if any.
        error: String,
    },
    /// The runs did not finish within [`TIME_LIMIT`].
    #[error("the runs did not finish within {0:?}")]
    TimedOut(Duration),
    /// The table could not be written.
    #[error("cannot write the table: {0}")]
    Output(std::io::Error),
}

/// The scenario as one job per rule: `(rule, body)`, with `replicates` (and a chunk size no
/// larger) put in when given.
pub fn scenario_jobs(replicates: Option<u64>) -> Result<Vec<(&'static str, Vec<u8>)>, DemoError> {
    let base: Value =
        serde_json::from_str(SCENARIO).map_err(|e| DemoError::Scenario(e.to_string()))?;
    RULES
        .iter()
        .map(|&rule| {
            let mut job = base.clone();
            let slot = job
                .pointer_mut("/dynamics/rule")
                .ok_or_else(|| DemoError::Scenario("no dynamics.rule".to_owned()))?;
            *slot = Value::from(rule);
            if let Some(n) = replicates {
                let method = job
                    .get_mut("method")
                    .and_then(Value::as_object_mut)
                    .ok_or_else(|| DemoError::Scenario("no method".to_owned()))?;
                let chunk = method.get("chunk_size").and_then(Value::as_u64);
                method.insert("replicates".to_owned(), n.into());
                if let Some(c) = chunk {
                    method.insert("chunk_size".to_owned(), c.min(n).into());
                }
            }
            let body = serde_json::to_vec(&job).map_err(|e| DemoError::Scenario(e.to_string()))?;
            Ok((rule, body))
        })
        .collect()
}

/// Where the demo's database is, and what the demo made for it.
#[derive(Debug)]
struct DatabasePlace {
    db: PathBuf,
    made_dir: Option<PathBuf>,
}

impl DatabasePlace {
    fn prepare(db: Option<&Path>) -> Result<Self, DemoError> {
        let directory = |path: &Path, source| DemoError::Directory {
            path: path.to_owned(),
            source,
        };
        match db {
            Some(path) => {
                let path = std::path::absolute(path).map_err(|e| directory(path, e))?;
                if path.exists() {
                    return Err(DemoError::DatabaseExists(path));
                }
                if let Some(parent) = path.parent() {
                    std::fs::create_dir_all(parent).map_err(|e| directory(parent, e))?;
                }
                Ok(Self {
                    db: path,
                    made_dir: None,
                })
            }
            None => {
                let stamp = chrono::Utc::now().format("%Y%m%dT%H%M%S%.3fZ");
                let name = format!("demefix-demo-{stamp}-{}", std::process::id());
                let dir = std::path::absolute(std::env::temp_dir().join(name))
                    .map_err(|e| directory(&std::env::temp_dir(), e))?;
                std::fs::create_dir(&dir).map_err(|e| directory(&dir, e))?;
                Ok(Self {
                    db: dir.join("demefix.db"),
                    made_dir: Some(dir),
                })
            }
        }
    }

    /// Removes the database, its WAL and shared-memory files, and the directory the demo made.
    fn discard(&self) {
        for suffix in ["", "-wal", "-shm"] {
            let mut name = self.db.clone().into_os_string();
            name.push(suffix);
            let _ = std::fs::remove_file(PathBuf::from(name));
        }
        if let Some(dir) = &self.made_dir {
            let _ = std::fs::remove_dir(dir);
        }
    }
}

/// A run the demo submitted, and its document once it succeeded.
#[derive(Debug, Clone)]
pub struct DemoRun {
    /// Update rule.
    pub rule: &'static str,
    /// Run id.
    pub id: String,
    /// The run document (`GET /v1/runs/{id}`) once succeeded.
    pub document: Value,
}

/// Runs the demo and writes the table to `out`; status and progress go to stderr unless
/// `options.quiet`.
pub fn run(options: &DemoOptions, out: &mut dyn Write) -> Result<(), DemoError> {
    let jobs = scenario_jobs(options.replicates)?;
    let place = DatabasePlace::prepare(options.db.as_deref())?;
    let raw = RawConfig {
        bind: Some("127.0.0.1:0".to_owned()),
        workers: options.workers.map(|n| n.to_string()),
        ..RawConfig::default()
    };
    let mut config = Config::from_raw(&raw)
        .map_err(|e| DemoError::Scenario(format!("demo configuration: {e}")))?;
    config.db = place.db.clone();
    let status = Status::new(options.quiet);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .map_err(DemoError::Runtime)?;
    let started = Instant::now();
    let runs = runtime.block_on(async {
        let running = server::start(config).await?;
        status.line(&format!(
            "demefix demo: service at http://{} with database {}",
            running.addr,
            place.db.display()
        ));
        let outcome = submit_and_wait(running.addr, &jobs, &status).await;
        running.stop().await;
        outcome
    })?;
    drop(runtime);
    status.line(&format!(
        "demefix demo: {} runs finished in {:.1} s",
        runs.len(),
        started.elapsed().as_secs_f64()
    ));
    write_report(out, &runs, &place.db, options.discard).map_err(DemoError::Output)?;
    if options.discard {
        place.discard();
    }
    Ok(())
}

/// Posts every job, then polls the runs until all have succeeded.
async fn submit_and_wait(
    addr: SocketAddr,
    jobs: &[(&'static str, Vec<u8>)],
    status: &Status,
) -> Result<Vec<DemoRun>, DemoError> {
    let mut submitted = Vec::with_capacity(jobs.len());
    let mut totals = Vec::with_capacity(jobs.len());
    for (rule, body) in jobs {
        let doc = exchange_json(addr, "POST", "/v1/runs", Some(body), 202).await?;
        let id = doc["id"]
            .as_str()
            .ok_or_else(|| unexpected("POST /v1/runs", 202, "a run document without an id"))?
            .to_owned();
        status.line(&format!("submitted {rule} as run {id}"));
        totals.push(doc["progress"]["total"].as_u64().unwrap_or(0));
        submitted.push((*rule, id));
    }
    status.start_bars(&submitted, &totals);
    let started = Instant::now();
    let mut finished: Vec<Option<Value>> = vec![None; submitted.len()];
    loop {
        for (k, (rule, id)) in submitted.iter().enumerate() {
            if finished[k].is_some() {
                continue;
            }
            let path = format!("/v1/runs/{id}");
            let doc = exchange_json(addr, "GET", &path, None, 200).await?;
            let state = doc["status"].as_str().unwrap_or_default().to_owned();
            let done = doc["progress"]["done"].as_u64().unwrap_or(0);
            let total = doc["progress"]["total"].as_u64().unwrap_or(0);
            status.progress(k, done, total, &state);
            match state.as_str() {
                "succeeded" => finished[k] = Some(doc),
                "failed" | "cancelled" => {
                    status.clear();
                    return Err(DemoError::RunEnded {
                        id: id.clone(),
                        rule,
                        status: state,
                        error: doc["error"]
                            .as_str()
                            .unwrap_or("no reason given")
                            .to_owned(),
                    });
                }
                _ => {}
            }
        }
        if finished.iter().all(Option::is_some) {
            break;
        }
        if started.elapsed() > TIME_LIMIT {
            status.clear();
            return Err(DemoError::TimedOut(TIME_LIMIT));
        }
        tokio::time::sleep(POLL_INTERVAL).await;
    }
    status.clear();
    Ok(submitted
        .into_iter()
        .zip(finished)
        .map(|((rule, id), document)| DemoRun {
            rule,
            id,
            document: document.unwrap_or_default(),
        })
        .collect())
}

fn unexpected(request: &str, status: u16, body: &str) -> DemoError {
    DemoError::Unexpected {
        request: request.to_owned(),
        status,
        body: body.to_owned(),
    }
}

/// One exchange whose answer must have status `want` and a JSON body.
async fn exchange_json(
    addr: SocketAddr,
    method: &str,
    path: &str,
    body: Option<&[u8]>,
    want: u16,
) -> Result<Value, DemoError> {
    let reply = http_client::exchange(addr, method, path, body).await?;
    let request = format!("{method} {path}");
    if reply.status != want {
        return Err(unexpected(
            &request,
            reply.status,
            &String::from_utf8_lossy(&reply.body),
        ));
    }
    serde_json::from_slice(&reply.body)
        .map_err(|e| unexpected(&request, reply.status, &format!("not JSON: {e}")))
}

/// Status lines and one progress bar per run on stderr (bars only on a terminal).
struct Status {
    quiet: bool,
    multi: MultiProgress,
    bars: std::sync::Mutex<Vec<ProgressBar>>,
}

impl Status {
    fn new(quiet: bool) -> Self {
        let target = if quiet || !std::io::stderr().is_terminal() {
            ProgressDrawTarget::hidden()
        } else {
            ProgressDrawTarget::stderr()
        };
        Self {
            quiet,
            multi: MultiProgress::with_draw_target(target),
            bars: std::sync::Mutex::new(Vec::new()),
        }
    }

    fn line(&self, text: &str) {
        if self.quiet {
            return;
        }
        if self.multi.is_hidden() {
            eprintln!("{text}");
        } else {
            let _ = self.multi.println(text);
        }
    }

    fn start_bars(&self, runs: &[(&'static str, String)], totals: &[u64]) {
        let style = ProgressStyle::with_template(
            "{prefix:>12} [{bar:30}] {pos}/{len} replicates {msg} ({elapsed})",
        )
        .ok()
        .map(|s| s.progress_chars("=> "));
        let mut bars = self.bars.lock().unwrap_or_else(|e| e.into_inner());
        for ((rule, _), total) in runs.iter().zip(totals) {
            let bar = self.multi.add(ProgressBar::new(*total));
            if let Some(style) = &style {
                bar.set_style(style.clone());
            }
            bar.set_prefix(*rule);
            bars.push(bar);
        }
    }

    fn progress(&self, k: usize, done: u64, total: u64, state: &str) {
        let bars = self.bars.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(bar) = bars.get(k) {
            bar.set_length(total);
            bar.set_position(done);
            bar.set_message(state.to_owned());
        }
    }

    fn clear(&self) {
        let bars = self.bars.lock().unwrap_or_else(|e| e.into_inner());
        for bar in bars.iter() {
            bar.finish_and_clear();
        }
        let _ = self.multi.clear();
    }
}

/// A probability for the table: four decimals, or scientific notation below 0.001.
fn probability(x: f64) -> String {
    if x == 0.0 || x >= 1e-3 {
        format!("{x:.4}")
    } else {
        format!("{x:.2e}")
    }
}

/// The table row of one result of `rule`.
fn row(rule: &str, r: &Value) -> [String; 8] {
    let number = |key: &str| r.get(key).and_then(Value::as_f64);
    let missing = || "n/a".to_owned();
    let interval = match r.get("ci95").and_then(Value::as_array) {
        Some(ci) if ci.len() == 2 => match (ci[0].as_f64(), ci[1].as_f64()) {
            (Some(lo), Some(hi)) => format!("[{}, {}]", probability(lo), probability(hi)),
            _ => missing(),
        },
        _ if r["method"] == "exact" => "exact".to_owned(),
        _ => missing(),
    };
    let time = match (
        number("mean_fixation_generations"),
        number("mean_fixation_days"),
    ) {
        (Some(g), Some(d)) => format!("{g:.1} gen = {d:.0} days"),
        (Some(g), None) => format!("{g:.1} gen"),
        _ => missing(),
    };
    [
        rule.to_owned(),
        r["s"].to_string(),
        r["start"].as_str().map_or_else(missing, str::to_owned),
        number("fixation_probability").map_or_else(missing, probability),
        interval,
        number("well_mixed_fixation_probability").map_or_else(missing, probability),
        number("ratio_to_well_mixed").map_or_else(missing, |x| format!("{x:.3}")),
        time,
    ]
}

/// Writes `rows` under `header` in aligned columns, two spaces apart.
fn write_table<const N: usize>(
    out: &mut dyn Write,
    header: [&str; N],
    rows: &[[String; N]],
) -> std::io::Result<()> {
    let mut widths = header.map(str::len);
    for r in rows {
        for (w, cell) in widths.iter_mut().zip(r) {
            *w = (*w).max(cell.chars().count());
        }
    }
    let line = |cells: Vec<&str>| {
        let mut text = String::new();
        for (k, (cell, w)) in cells.iter().zip(widths).enumerate() {
            if k + 1 == N {
                text.push_str(cell);
            } else {
                text.push_str(&format!("{cell:<w$}  "));
            }
        }
        text
    };
    writeln!(out, "{}", line(header.to_vec()))?;
    for r in rows {
        writeln!(out, "{}", line(r.iter().map(String::as_str).collect()))?;
    }
    Ok(())
}

/// `text` broken into lines of at most `width` characters (at spaces).
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = Vec::new();
    let mut current = String::new();
    for word in text.split_whitespace() {
        if !current.is_empty() && current.len() + 1 + word.len() > width {
            lines.push(std::mem::take(&mut current));
        }
        if !current.is_empty() {
            current.push(' ');
        }
        current.push_str(word);
    }
    if !current.is_empty() {
        lines.push(current);
    }
    lines
}

/// The report: scenario line, results table, notes, run ids, database, caution.
fn write_report(
    out: &mut dyn Write,
    runs: &[DemoRun],
    db: &Path,
    discarded: bool,
) -> std::io::Result<()> {
    let spec = runs.first().map(|r| &r.document["spec"]);
    let text = |v: Option<&Value>| v.and_then(Value::as_str).unwrap_or_default().to_owned();
    let label = text(spec.map(|s| &s["label"]));
    let method = spec.map(|s| &s["method"]);
    let field = |key: &str| method.map_or(Value::Null, |m| m[key].clone());
    let demes = spec
        .and_then(|s| s["population"]["demes"].as_array())
        .map_or(0, Vec::len);
    let total: u64 = spec
        .and_then(|s| s["population"]["demes"].as_array())
        .map_or(0, |d| d.iter().filter_map(|d| d["size"].as_u64()).sum());
    writeln!(out, "{label}")?;
    writeln!(
        out,
        "scenario {SCENARIO_PATH}: {demes} demes, N = {total}; posted once per rule; method {}, \
         {} replicates per row, seed {}",
        field("kind").as_str().unwrap_or("?"),
        field("replicates"),
        field("seed"),
    )?;
    writeln!(out)?;
    let mut rows = Vec::new();
    let mut reference = "well-mixed".to_owned();
    for run in runs {
        for r in run.document["results"].as_array().into_iter().flatten() {
            if let Some(name) = r["well_mixed_method"].as_str() {
                reference = format!("well-mixed ({name})");
            }
            rows.push(row(run.rule, r));
        }
    }
    write_table(
        out,
        [
            "rule",
            "s",
            "start",
            "P(fixation)",
            "95% interval",
            "well-mixed",
            "ratio",
            "mean fixation time",
        ],
        &rows,
    )?;
    writeln!(out)?;
    for note in [
        "P(fixation): share of replicates that fixed, with its 95% interval; an exact result \
         has no interval."
            .to_owned(),
        format!(
            "ratio: P(fixation) over the {reference} reference of the same total size; above \
             1 the structure amplifies selection, below 1 it suppresses it."
        ),
        "mean fixation time: over the replicates that fixed, in generations (N events) and in \
         days (dynamics.generation_days)."
            .to_owned(),
    ] {
        for line in wrap(&note, 96) {
            writeln!(out, "{line}")?;
        }
    }
    for run in runs {
        for w in run.document["warnings"].as_array().into_iter().flatten() {
            writeln!(
                out,
                "warning ({}): {}",
                run.rule,
                w.as_str().unwrap_or_default()
            )?;
        }
    }
    writeln!(out)?;
    for run in runs {
        writeln!(out, "run {:<12} {}", run.rule, run.id)?;
    }
    if discarded {
        writeln!(out, "database {} (discarded)", db.display())?;
    } else {
        writeln!(out, "database {}", db.display())?;
        writeln!(
            out,
            "  to browse it: DEMEFIX_DB={} demefix serve, then GET http://127.0.0.1:8080/v1/runs",
            db.display()
        )?;
    }
    writeln!(out)?;
    let caution = format!("Caution. {}", crate::document::DISCLAIMER);
    for line in wrap(&caution, 96) {
        writeln!(out, "{line}")?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spec::{self, Limits};

    #[test]
    fn the_scenario_is_a_valid_job_for_every_rule() {
        let jobs = scenario_jobs(Some(300)).unwrap();
        assert_eq!(jobs.len(), RULES.len());
        for ((rule, body), want) in jobs.iter().zip(RULES) {
            assert_eq!(*rule, want);
            let job = spec::parse_bytes(body, &Limits::default())
                .unwrap_or_else(|e| panic!("{rule}: {e:?}"));
            let spec = serde_json::to_value(job.spec()).unwrap();
            assert_eq!(spec["dynamics"]["rule"], want);
            assert_eq!(spec["method"]["replicates"], 300);
            assert_eq!(spec["method"]["chunk_size"], 300);
            assert!(spec["selection"]["s"].as_array().unwrap().len() >= 3);
        }
        let unchanged: Value = serde_json::from_slice(&scenario_jobs(None).unwrap()[0].1).unwrap();
        let file: Value = serde_json::from_str(SCENARIO).unwrap();
        assert_eq!(unchanged["method"], file["method"]);
    }

    fn result(method: &str, ci: bool) -> Value {
        let mut r = serde_json::json!({
            "s": 0.05, "start": "gullrock", "method": method,
            "fixation_probability": 0.0285, "well_mixed_fixation_probability": 0.0476,
            "ratio_to_well_mixed": 0.5985, "well_mixed_method": "moran",
            "mean_fixation_generations": 179.4, "mean_fixation_days": 897.0
        });
        if ci {
            r["ci95"] = serde_json::json!([0.0238, 0.0341]);
        }
        r
    }

    #[test]
    fn the_report_has_one_row_per_result_and_names_runs_database_and_caution() {
        let runs = vec![DemoRun {
            rule: "death_birth",
            id: "0193-id".to_owned(),
            document: serde_json::json!({
                "spec": {"label": "Fictional", "population": {"demes": [{"id": "a", "size": 3}]},
                         "method": {"kind": "ensemble", "replicates": 10, "seed": 1}},
                "results": [result("ensemble", true), result("exact", false)],
                "warnings": ["a warning"]
            }),
        }];
        let mut out = Vec::new();
        write_report(&mut out, &runs, Path::new("/tmp/x/demefix.db"), false).unwrap();
        let text = String::from_utf8(out).unwrap();
        let rows: Vec<&str> = text
            .lines()
            .filter(|l| l.starts_with("death_birth"))
            .collect();
        assert_eq!(rows.len(), 2, "{text}");
        assert!(rows[0].contains("[0.0238, 0.0341]"), "{text}");
        assert!(rows[1].contains("exact"), "{text}");
        assert!(rows[0].contains("179.4 gen = 897 days"), "{text}");
        assert!(text.contains("well-mixed (moran)"));
        assert!(text.contains("run death_birth  0193-id"));
        assert!(text.contains("database /tmp/x/demefix.db"));
        assert!(text.contains("warning (death_birth): a warning"));
        assert!(text.contains("not forecasts"));
        assert!(text.contains("public-health authorities"));
    }

    #[test]
    fn small_probabilities_keep_their_digits() {
        assert_eq!(probability(0.0285), "0.0285");
        assert_eq!(probability(0.0), "0.0000");
        assert_eq!(probability(0.000123), "1.23e-4");
        assert_eq!(wrap("a bb ccc dddd", 6), ["a bb", "ccc", "dddd"]);
    }

    #[test]
    fn a_named_database_that_exists_is_refused() {
        let dir = std::env::temp_dir().join(format!("demefix-demo-test-{}", uuid::Uuid::now_v7()));
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("taken.db");
        std::fs::write(&db, b"").unwrap();
        assert!(matches!(
            DatabasePlace::prepare(Some(&db)),
            Err(DemoError::DatabaseExists(_))
        ));
        let fresh = DatabasePlace::prepare(Some(&dir.join("sub/new.db"))).unwrap();
        assert!(fresh.db.is_absolute() && fresh.db.parent().unwrap().is_dir());
        let made = DatabasePlace::prepare(None).unwrap();
        assert!(made.made_dir.as_ref().unwrap().is_dir());
        made.discard();
        assert!(!made.made_dir.unwrap().exists());
        let _ = std::fs::remove_dir_all(&dir);
    }
}
