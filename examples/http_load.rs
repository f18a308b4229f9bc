//! HTTP load benchmark of the service while its workers are busy (run by hand, not a test):
//!
//! ```sh
//! cargo run --release --example http_load -- --rps 200 --seconds 20
//! ```
//!
//! Starts the service in this process (port 0 on 127.0.0.1, a fresh SQLite file under the
//! system temp dir, `DEMEFIX_WORKERS` worker slots, default all cores), occupies every
//! worker with a long seeded ensemble, then drives an open-loop load at a constant rate: the
//! requests are scheduled at fixed intervals whatever the answers do, and each latency is
//! measured from the request's scheduled time to the end of its response body, so a stalled
//! server cannot hide its stall by slowing the load (no coordinated omission). The mix is
//! `POST /v1/runs` of small, distinct exact jobs (they queue behind the ensembles) and
//! `GET /v1/runs/{id}` of runs submitted so far. Prints the rates achieved, latency quantiles
//! per route, error counts and the machine.
//!
//! Options: `--rps N` (200), `--seconds N` (20), `--warmup N` seconds not counted (2),
//! `--post-share X` share of requests that are submissions (0.25), `--workers N` (all cores),
//! `--busy-runs N` long ensembles started first (one per worker).

use demefix::config::{Config, RawConfig};
use serde_json::json;
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// Longest wait for one answer before it counts as an error.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(10);

#[derive(Debug, Clone)]
struct Options {
    rps: f64,
    seconds: f64,
    warmup: f64,
    post_share: f64,
    workers: Option<usize>,
    busy_runs: Option<usize>,
}

fn parse_options() -> Result<Options, String> {
    let mut o = Options {
        rps: 200.0,
        seconds: 20.0,
        warmup: 2.0,
        post_share: 0.25,
        workers: None,
        busy_runs: None,
    };
    let mut args = std::env::args().skip(1);
    while let Some(flag) = args.next() {
        let mut value = || args.next().ok_or_else(|| format!("{flag} needs a value"));
        let number = |text: String| {
            text.parse::<f64>()
                .ok()
                .filter(|x| x.is_finite() && *x >= 0.0)
                .ok_or_else(|| format!("{flag}: `{text}` is not a non-negative number"))
        };
        match flag.as_str() {
            "--rps" => o.rps = number(value()?)?,
            "--seconds" => o.seconds = number(value()?)?,
            "--warmup" => o.warmup = number(value()?)?,
            "--post-share" => o.post_share = number(value()?)?.min(1.0),
            "--workers" => o.workers = Some(number(value()?)? as usize),
            "--busy-runs" => o.busy_runs = Some(number(value()?)? as usize),
            "--help" | "-h" => {
                return Err("options: --rps N --seconds N --warmup N --post-share X \
                            --workers N --busy-runs N"
                    .to_owned())
            }
            other => return Err(format!("unknown option `{other}` (try --help)")),
        }
    }
    if o.rps <= 0.0 || o.seconds <= 0.0 {
        return Err("--rps and --seconds must be positive".to_owned());
    }
    Ok(o)
}

/// A long ensemble: far more replicates than the benchmark lasts, in short chunks, so every
/// worker computes (and commits a checkpoint after each chunk) throughout.
fn busy_job(k: usize) -> serde_json::Value {
    json!({
        "label": format!("http_load busy ensemble {k}"),
        "population": {"demes": [{"id": "x", "size": 300}, {"id": "y", "size": 200}]},
        "migration": {"orientation": "dispersal", "matrix": [[0.9, 0.1], [0.2, 0.8]]},
        "dynamics": {"rule": "birth_death"},
        "selection": {"s": [0.05]},
        "start": ["uniform"],
        "method": {"kind": "ensemble", "seed": 1000 + k, "replicates": 100_000_000, "chunk_size": 2000}
    })
}

/// A small exact job (three demes), distinct for every `k` so no two share a spec hash.
fn small_job(k: u64) -> Vec<u8> {
    json!({
        "label": format!("http_load submission {k}"),
        "series": "http-load",
        "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 4}, {"id": "c", "size": 2}]},
        "migration": {"orientation": "flows", "matrix": [[0, 4, 1], [3, 0, 2], [1, 1, 0]]},
        "dynamics": {"rule": "death_birth"},
        "selection": {"s": [0.1 + (k as f64) * 1e-9]},
        "start": ["a", "uniform"],
        "method": {"kind": "exact"}
    })
    .to_string()
    .into_bytes()
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Route {
    Submit,
    Fetch,
}

impl Route {
    fn name(self) -> &'static str {
        match self {
            Route::Submit => "POST /v1/runs",
            Route::Fetch => "GET /v1/runs/{id}",
        }
    }
}

/// What one scheduled request came to.
#[derive(Debug, Clone)]
struct Sample {
    route: Route,
    /// Scheduled time, from the start of the load.
    at: Duration,
    /// From the scheduled time to the end of the response body.
    latency: Duration,
    /// HTTP status, or `None` for a transport error or timeout.
    status: Option<u16>,
}

/// A small deterministic generator for the mix and the ids fetched (no `rand` in this
/// package's dependencies).
struct SplitMix(u64);

impl SplitMix {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
}

fn quantile(sorted: &[Duration], q: f64) -> Duration {
    if sorted.is_empty() {
        return Duration::ZERO;
    }
    let rank = ((q * sorted.len() as f64).ceil() as usize).clamp(1, sorted.len());
    sorted[rank - 1]
}

fn ms(d: Duration) -> String {
    format!("{:.2}", d.as_secs_f64() * 1e3)
}

fn machine() -> String {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let load = std::fs::read_to_string("/proc/loadavg")
        .ok()
        .and_then(|l| {
            l.split_whitespace()
                .take(3)
                .collect::<Vec<_>>()
                .join(" ")
                .into()
        })
        .unwrap_or_else(|| "unknown".to_owned());
    let model = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|c| {
            c.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split_once(':'))
                .map(|(_, v)| v.trim().to_owned())
        })
        .unwrap_or_else(|| "unknown CPU".to_owned());
    let profile = if cfg!(debug_assertions) {
        "debug"
    } else {
        "release"
    };
    format!("{cores} cores ({model}), load average {load}, {profile} build")
}

fn main() -> std::process::ExitCode {
    let options = match parse_options() {
        Ok(o) => o,
        Err(message) => {
            eprintln!("http_load: {message}");
            return std::process::ExitCode::from(2);
        }
    };
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .expect("a tokio runtime");
    match runtime.block_on(bench(options)) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(message) => {
            eprintln!("http_load: {message}");
            std::process::ExitCode::from(1)
        }
    }
}

async fn bench(o: Options) -> Result<(), String> {
    let dir = std::env::temp_dir().join(format!(
        "demefix-http-load-{}-{}",
        std::process::id(),
        chrono_free_stamp()
    ));
    std::fs::create_dir_all(&dir).map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
    let raw = RawConfig {
        bind: Some("127.0.0.1:0".to_owned()),
        db: Some(dir.join("demefix.db").display().to_string()),
        workers: o.workers.map(|n| n.to_string()),
        ..RawConfig::default()
    };
    let config = Config::from_raw(&raw).map_err(|e| e.to_string())?;
    let workers = config.workers;
    let running = demefix::server::start(config)
        .await
        .map_err(|e| format!("the service does not start: {e}"))?;
    let base = format!("http://{}", running.addr);
    let client = reqwest::Client::builder()
        .timeout(REQUEST_TIMEOUT)
        .build()
        .map_err(|e| e.to_string())?;

    // Occupy every worker, and wait until each long run is claimed.
    let busy = o.busy_runs.unwrap_or(workers);
    let mut busy_ids = Vec::new();
    for k in 0..busy {
        let res = client
            .post(format!("{base}/v1/runs"))
            .json(&busy_job(k))
            .send()
            .await
            .map_err(|e| e.to_string())?;
        let run: serde_json::Value = res.json().await.map_err(|e| e.to_string())?;
        busy_ids.push(run["id"].as_str().unwrap_or_default().to_owned());
    }
    let deadline = Instant::now() + Duration::from_secs(30);
    'claimed: loop {
        let mut running_now = 0;
        for id in &busy_ids {
            let run: serde_json::Value = client
                .get(format!("{base}/v1/runs/{id}"))
                .send()
                .await
                .map_err(|e| e.to_string())?
                .json()
                .await
                .map_err(|e| e.to_string())?;
            if run["status"] == "running" {
                running_now += 1;
            }
        }
        if running_now == busy_ids.len() {
            break 'claimed;
        }
        if Instant::now() > deadline {
            return Err("the busy runs were not claimed within 30 s".to_owned());
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    // Ids to fetch: the busy runs to begin with, then every submission.
    let known = Arc::new(Mutex::new(busy_ids.clone()));

    println!("machine: {}", machine());
    println!(
        "service: {workers} workers, {busy} long ensembles computing; database {}",
        dir.join("demefix.db").display()
    );
    println!(
        "load: {} requests/s for {} s after a {} s warm-up, {:.0}% submissions, open loop",
        o.rps,
        o.seconds,
        o.warmup,
        o.post_share * 100.0
    );

    let total = ((o.warmup + o.seconds) * o.rps).round() as u64;
    let interval = Duration::from_secs_f64(1.0 / o.rps);
    let samples = Arc::new(Mutex::new(Vec::with_capacity(total as usize)));
    let submissions = Arc::new(AtomicU64::new(0));
    let mut mix = SplitMix(20261202);
    let start = tokio::time::Instant::now();
    let mut tasks = Vec::with_capacity(total as usize);
    for i in 0..total {
        let at = interval * i as u32;
        tokio::time::sleep_until(start + at).await;
        // Fetch only once there is something to fetch.
        let route = if mix.unit() < o.post_share || (busy_ids.is_empty() && i == 0) {
            Route::Submit
        } else {
            Route::Fetch
        };
        let pick = mix.next();
        let (client, base, known, samples, submissions) = (
            client.clone(),
            base.clone(),
            known.clone(),
            samples.clone(),
            submissions.clone(),
        );
        tasks.push(tokio::spawn(async move {
            let scheduled = start + at;
            let outcome = match route {
                Route::Submit => {
                    let k = submissions.fetch_add(1, Ordering::Relaxed);
                    let res = client
                        .post(format!("{base}/v1/runs"))
                        .header("content-type", "application/json")
                        .body(small_job(k))
                        .send()
                        .await;
                    match res {
                        Ok(res) => {
                            let status = res.status().as_u16();
                            match res.bytes().await {
                                Ok(body) => {
                                    if status == 202 {
                                        if let Ok(v) =
                                            serde_json::from_slice::<serde_json::Value>(&body)
                                        {
                                            if let Some(id) = v["id"].as_str() {
                                                known.lock().unwrap().push(id.to_owned());
                                            }
                                        }
                                    }
                                    Some(status)
                                }
                                Err(_) => None,
                            }
                        }
                        Err(_) => None,
                    }
                }
                Route::Fetch => {
                    let id = {
                        let ids = known.lock().unwrap();
                        match ids.len() {
                            0 => uuid_of_nothing(),
                            n => ids[(pick % n as u64) as usize].clone(),
                        }
                    };
                    match client.get(format!("{base}/v1/runs/{id}")).send().await {
                        Ok(res) => {
                            let status = res.status().as_u16();
                            res.bytes().await.ok().map(|_| status)
                        }
                        Err(_) => None,
                    }
                }
            };
            let latency = tokio::time::Instant::now().duration_since(scheduled);
            samples.lock().unwrap().push(Sample {
                route,
                at,
                latency,
                status: outcome,
            });
        }));
    }
    let scheduling_done = start.elapsed();
    for t in tasks {
        let _ = t.await;
    }
    let wall = start.elapsed();

    let samples = samples.lock().unwrap().clone();
    let warm = Duration::from_secs_f64(o.warmup);
    let measured: Vec<&Sample> = samples.iter().filter(|s| s.at >= warm).collect();
    println!(
        "scheduled {} requests in {:.2} s (last answer at {:.2} s); measured {} after the warm-up",
        samples.len(),
        scheduling_done.as_secs_f64(),
        wall.as_secs_f64(),
        measured.len()
    );
    let mut by_route: BTreeMap<Route, Vec<&Sample>> = BTreeMap::new();
    for s in &measured {
        by_route.entry(s.route).or_default().push(s);
    }
    println!(
        "{:<20} {:>7} {:>9} {:>8} {:>8} {:>8} {:>8}  errors",
        "route", "count", "per s", "p50 ms", "p90 ms", "p99 ms", "max ms"
    );
    for (route, list) in &by_route {
        let ok = |s: &&&Sample| {
            s.status
                .is_some_and(|c| matches!((route, c), (Route::Submit, 202) | (Route::Fetch, 200)))
        };
        let mut lat: Vec<Duration> = list.iter().map(|s| s.latency).collect();
        lat.sort();
        let mut errors: BTreeMap<String, usize> = BTreeMap::new();
        for s in list.iter().filter(|s| !ok(s)) {
            let key = s
                .status
                .map_or_else(|| "transport".to_owned(), |c| c.to_string());
            *errors.entry(key).or_default() += 1;
        }
        let good = list.iter().filter(ok).count();
        let errors = if errors.is_empty() {
            "0".to_owned()
        } else {
            errors
                .iter()
                .map(|(k, n)| format!("{n}x{k}"))
                .collect::<Vec<_>>()
                .join(" ")
        };
        println!(
            "{:<20} {:>7} {:>9.1} {:>8} {:>8} {:>8} {:>8}  {}",
            route.name(),
            list.len(),
            good as f64 / o.seconds,
            ms(quantile(&lat, 0.5)),
            ms(quantile(&lat, 0.9)),
            ms(quantile(&lat, 0.99)),
            ms(lat.last().copied().unwrap_or_default()),
            errors
        );
    }
    let mut all: Vec<Duration> = measured.iter().map(|s| s.latency).collect();
    all.sort();
    println!(
        "{:<20} {:>7} {:>9.1} {:>8} {:>8} {:>8} {:>8}",
        "all",
        all.len(),
        all.len() as f64 / o.seconds,
        ms(quantile(&all, 0.5)),
        ms(quantile(&all, 0.9)),
        ms(quantile(&all, 0.99)),
        ms(all.last().copied().unwrap_or_default()),
    );
    let mut progress = Vec::new();
    for id in &busy_ids {
        if let Ok(res) = client.get(format!("{base}/v1/runs/{id}")).send().await {
            if let Ok(v) = res.json::<serde_json::Value>().await {
                progress.push(format!(
                    "{}/{}",
                    v["progress"]["done"], v["progress"]["total"]
                ));
            }
        }
    }
    println!(
        "busy ensembles kept computing: replicates done {}",
        progress.join(", ")
    );
    if let Ok(res) = client.get(format!("{base}/metrics")).send().await {
        if let Ok(text) = res.text().await {
            for line in server_side(&text) {
                println!("{line}");
            }
        }
    }
    running.stop().await;
    let _ = std::fs::remove_dir_all(&dir);
    Ok(())
}

/// The service's own view from `/metrics` (whole run, warm-up included): per route, the
/// mean handling time and the share of answers within 20 ms (a histogram bucket bound).
fn server_side(metrics: &str) -> Vec<String> {
    let mut lines = Vec::new();
    for (method, route) in [("POST", "/v1/runs"), ("GET", "/v1/runs/{id}")] {
        let labels = |l: &str| {
            l.contains(&format!("method=\"{method}\"")) && l.contains(&format!("route=\"{route}\""))
        };
        let value = |l: &str| {
            l.rsplit(' ')
                .next()
                .and_then(|v| v.parse::<f64>().ok())
                .unwrap_or(0.0)
        };
        let series = |name: &str| -> f64 {
            metrics
                .lines()
                .filter(|l| l.starts_with(name) && labels(l))
                .map(value)
                .sum()
        };
        let count = series("demefix_http_request_duration_seconds_count");
        let sum = series("demefix_http_request_duration_seconds_sum");
        let within: f64 = metrics
            .lines()
            .filter(|l| {
                l.starts_with("demefix_http_request_duration_seconds_bucket")
                    && l.contains("le=\"0.02\"")
                    && labels(l)
            })
            .map(value)
            .sum();
        if count > 0.0 {
            lines.push(format!(
                "server side {method} {route}: {count} answered, mean {:.2} ms, {:.1}% within 20 ms",
                sum / count * 1e3,
                within / count * 100.0
            ));
        }
    }
    // the single writer and the WAL checkpoints: where a slow submission waited
    let histogram = |name: &str, label: &str| -> Option<(f64, f64, f64)> {
        let series = |suffix: &str, extra: &str| -> f64 {
            metrics
                .lines()
                .filter(|l| {
                    l.starts_with(&format!("{name}_{suffix}"))
                        && l.contains(label)
                        && l.contains(extra)
                })
                .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
                .sum()
        };
        let count = series("count", "");
        let slow = count - series("bucket", "le=\"0.02\"");
        (count > 0.0).then(|| (count, series("sum", "") / count * 1e3, slow))
    };
    for op in [
        "submit",
        "claim",
        "heartbeat",
        "commit_chunk",
        "finish",
        "requeue",
    ] {
        if let Some((count, mean, slow)) =
            histogram("demefix_db_write_duration_seconds", &format!("op=\"{op}\""))
        {
            lines.push(format!(
                "writer {op}: {count} writes, mean {mean:.2} ms, {slow} over 20 ms"
            ));
        }
    }
    if let Some((count, mean, slow)) = histogram("demefix_wal_checkpoint_duration_seconds", "") {
        lines.push(format!(
            "WAL checkpoints: {count}, mean {mean:.2} ms, {slow} over 20 ms"
        ));
    }
    lines
}

/// An id no run has (a fetch scheduled before the first submission was answered gets 404,
/// counted as an error of that route).
fn uuid_of_nothing() -> String {
    "00000000-0000-7000-8000-000000000000".to_owned()
}

/// Nanoseconds since the epoch, for a unique directory name.
fn chrono_free_stamp() -> u128 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos())
}
