//! `GET /v1/runs/{id}/report` end to end: the service on a fresh SQLite file and a real socket,
//! an exact job and an ensemble sweep with link rows, their reports checked as HTML and then
//! rendered in headless Chromium (the DOM must hold the charts, and the browser console must
//! stay silent: the page has no scripts, and its Content-Security-Policy turns any attempt to
//! load something into a console message).
//!
//! Chromium is Debian's `chromium` (`.ci/run` installs it); `DEMEFIX_CHROMIUM` names another
//! binary. Without one the test fails when `CI` is set and otherwise skips the browser part,
//! saying why. `DEMEFIX_REPORT_SCREENSHOT=/path.png` also saves a screenshot of the ensemble
//! report there, for looking at by eye.

#[allow(dead_code)]
#[path = "api/helpers.rs"]
mod helpers;

use helpers::{small_job, spawn_app, TempDir, TestApp};
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);
const BROWSER: Duration = Duration::from_secs(60);

/// The exact job: three demes, a sweep of two values of s, adjoint link rows.
fn exact_job() -> Value {
    let mut job = small_job();
    job["selection"]["s"] = json!([0.05, 0.1]);
    job["method"] = json!({"kind": "exact"});
    job["outputs"] = json!({"sensitivity": true});
    job
}

/// The ensemble sweep: five fictional islands, arrival times, link rows from the
/// strong-migration gradient (inside its regime at these s) and paired ensembles.
fn ensemble_job() -> Value {
    json!({
        "label": "Fictional archipelago <test>",
        "series": "report-test",
        "population": {"demes": [
            {"id": "lantern_isle", "size": 320}, {"id": "kelp_harbour", "size": 260},
            {"id": "saltmarsh_key", "size": 220}, {"id": "north_skerry", "size": 180},
            {"id": "gullrock", "size": 140}]},
        "migration": {"orientation": "flows", "matrix": [
            [0, 42, 18, 9, 3], [38, 0, 25, 4, 6], [15, 22, 0, 2, 11],
            [11, 3, 1, 0, 0], [2, 7, 12, 0, 0]]},
        "dynamics": {"rule": "death_birth", "generation_days": 5.0},
        "selection": {"s": [0.02, 0.05], "scope": "deme"},
        "start": ["gullrock", "uniform"],
        "method": {"kind": "ensemble", "seed": 7031, "replicates": 400, "chunk_size": 200},
        "outputs": {"times": true, "arrival_fractions": [0.1, 0.5], "sensitivity": true}
    })
}

struct Report {
    html: String,
    etag: String,
}

async fn report(app: &TestApp, id: &str) -> Report {
    let res = app.get(&format!("/v1/runs/{id}/report")).await;
    assert_eq!(res.status(), 200);
    let header = |name: &str| {
        res.headers()
            .get(name)
            .unwrap_or_else(|| panic!("{name} header"))
            .to_str()
            .unwrap()
            .to_owned()
    };
    assert_eq!(header("content-type"), "text/html; charset=utf-8");
    assert!(header("content-security-policy").starts_with("default-src 'none'"));
    let etag = header("etag");
    Report {
        html: res.text().await.unwrap(),
        etag,
    }
}

/// Every value of `attribute` (`src=`, `href=`) and every `url(` in `html`.
fn references<'a>(html: &'a str, opener: &str) -> Vec<&'a str> {
    html.match_indices(opener)
        .map(|(i, _)| {
            let rest = html[i + opener.len()..].trim_start_matches(['"', '\'', ' ']);
            let end = rest
                .find(|c: char| c == '"' || c == '\'' || c == ')' || c.is_whitespace())
                .unwrap_or(rest.len());
            &rest[..end]
        })
        .collect()
}

/// The checks every report must pass as HTML: charts, captions, caution, provenance,
/// nothing to fetch.
fn check_html(html: &str, run: &Value, chart_ids: &[String]) {
    assert!(html.starts_with("<!DOCTYPE html>"));
    for id in chart_ids {
        let at = html
            .find(&format!("<figure id=\"{id}\""))
            .unwrap_or_else(|| panic!("figure {id} missing"));
        let figure = &html[at..at + html[at..].find("</figure>").unwrap()];
        assert!(figure.contains("<svg "), "{id}: no inline svg");
        assert!(figure.contains("<text"), "{id}: no text in the chart");
        let caption = &figure[figure.find("<figcaption>").expect("a caption")..];
        for needle in [
            "Model: ",
            "update rule",
            "selection scope",
            "fixed sizes",
            "not forecasts",
            "public-health authorities",
            "local regulations",
        ] {
            assert!(caption.contains(needle), "{id}: caption lacks {needle:?}");
        }
    }
    let figures = html.matches("<figure ").count();
    assert_eq!(figures, chart_ids.len(), "no other figure");
    assert_eq!(html.matches("<svg ").count(), figures);
    let p = &run["provenance"];
    for needle in [
        run["id"].as_str().unwrap(),
        p["spec_sha256"].as_str().unwrap(),
        p["matrix_sha256"].as_str().unwrap(),
        p["method"].as_str().unwrap(),
        p["method_version"].as_str().unwrap(),
        "succeeded",
    ] {
        assert!(html.contains(needle), "header lacks {needle}");
    }
    if let Some(seed) = p["seed"].as_u64() {
        assert!(html.contains(&format!(">{seed}<")), "header lacks the seed");
    }
    assert!(!html.contains("<script"), "no script at all");
    assert!(html.contains("http-equiv=\"Content-Security-Policy\""));
    for opener in ["src=", "href=", "url("] {
        for r in references(html, opener) {
            assert!(
                r.starts_with('#') || r.starts_with("data:"),
                "{opener}{r} points outside the page"
            );
        }
    }
    // The only address in the page is the SVG namespace name (never fetched).
    let addresses = html.matches("http://").count() + html.matches("https://").count();
    assert_eq!(
        addresses,
        html.matches("xmlns=\"http://www.w3.org/2000/svg\"").count()
    );
}

fn ids(prefix: &str, n: usize) -> Vec<String> {
    (0..n).map(|i| format!("{prefix}-{i}")).collect()
}

/// The browser to use, or why there is none.
fn chromium() -> Result<PathBuf, String> {
    if let Some(p) = std::env::var_os("DEMEFIX_CHROMIUM") {
        return Ok(PathBuf::from(p));
    }
    let path = std::env::var_os("PATH").unwrap_or_default();
    for dir in std::env::split_paths(&path) {
        for name in ["chromium", "chromium-browser"] {
            let candidate = dir.join(name);
            if candidate.is_file() {
                return Ok(candidate);
            }
        }
    }
    Err(
        "no `chromium` on PATH (install Debian's package `chromium`, as .ci/run does, or \
         set DEMEFIX_CHROMIUM)"
            .to_owned(),
    )
}

/// What the browser made of a page: its serialised DOM and the console lines it logged.
struct Rendered {
    dom: String,
    console: Vec<String>,
}

/// Runs headless Chromium on `page` with `mode` (`--dump-dom` or `--screenshot=...`) in a
/// window 1100 pixels wide and `height` high; a fresh profile, no background traffic,
/// logging on stderr.
async fn run_chromium(browser: &Path, page: &Path, mode: &str, height: u32) -> Rendered {
    let profile = TempDir::new("chromium-profile");
    let mut command = tokio::process::Command::new(browser);
    command
        .args([
            "--headless",
            "--disable-gpu",
            "--no-sandbox",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
            "--enable-logging=stderr",
            "--v=0",
        ])
        .arg(format!("--window-size=1100,{height}"))
        .arg(format!("--user-data-dir={}", profile.0.display()))
        .arg(mode)
        .arg(format!("file://{}", page.display()))
        .stdin(std::process::Stdio::null())
        .kill_on_drop(true);
    let out = tokio::time::timeout(BROWSER, command.output())
        .await
        .expect("chromium finishes within a minute")
        .expect("chromium starts");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        out.status.success(),
        "chromium failed ({}):\n{stderr}",
        out.status
    );
    Rendered {
        dom: String::from_utf8_lossy(&out.stdout).into_owned(),
        // Chromium logs every console message, whatever its level, as `...:CONSOLE...`.
        console: stderr
            .lines()
            .filter(|l| l.contains(":CONSOLE"))
            .map(str::to_owned)
            .collect(),
    }
}

async fn check_in_browser(browser: &Path, dir: &Path, name: &str, html: &str) {
    let page = dir.join(format!("{name}.html"));
    std::fs::write(&page, html).unwrap();
    let rendered = run_chromium(browser, &page, "--dump-dom", 1200).await;
    assert!(
        rendered.console.is_empty(),
        "{name}: console messages:\n{}",
        rendered.console.join("\n")
    );
    let dom = &rendered.dom;
    assert!(
        dom.contains("<title>demefix run "),
        "{name}: not rendered:\n{dom}"
    );
    let figures = html.matches("<figure ").count();
    assert!(figures > 0);
    assert_eq!(dom.matches("<figure ").count(), figures, "{name}");
    assert_eq!(
        dom.matches("<svg ").count(),
        figures,
        "{name}: charts in the DOM"
    );
    assert_eq!(dom.matches("<figcaption>").count(), figures, "{name}");
    assert_eq!(
        dom.matches("<rect ").count(),
        html.matches("<rect ").count(),
        "{name}: every shape of the charts survives parsing"
    );
    assert!(dom.contains("not forecasts"));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reports_are_self_contained_pages_with_captioned_charts_that_chromium_renders_cleanly() {
    let app = spawn_app().await;

    // An unknown run, a malformed id: 404 problem documents.
    for id in ["0193aaaa-0000-7000-8000-000000000000", "not-a-run"] {
        let res = app.get(&format!("/v1/runs/{id}/report")).await;
        assert_eq!(res.status(), 404);
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json"
        );
        let doc: Value = res.json().await.unwrap();
        assert_eq!(doc["type"], "/problems/not-found");
    }

    // A run that has not finished: 409 with Retry-After; once cancelled, a page saying so.
    let mut long = ensemble_job();
    long["method"]["replicates"] = json!(5_000_000);
    long["outputs"] = json!({"times": true});
    let res = app.post_job(&long).await;
    assert_eq!(res.status(), 202);
    let pending: Value = res.json().await.unwrap();
    let pending_id = pending["id"].as_str().unwrap().to_owned();
    let res = app.get(&format!("/v1/runs/{pending_id}/report")).await;
    assert_eq!(res.status(), 409);
    assert_eq!(res.headers()["retry-after"], "1");
    let doc: Value = res.json().await.unwrap();
    assert_eq!(doc["type"], "/problems/run-not-finished");
    assert_eq!(doc["run_id"], json!(pending_id));
    let res = app
        .client
        .post(app.url(&format!("/v1/runs/{pending_id}/cancel")))
        .send()
        .await
        .unwrap();
    assert!(res.status().is_success());
    let cancelled = app.wait_finished(&pending_id, FINISH).await;
    assert_eq!(cancelled["status"], "cancelled");
    let cancelled = report(&app, &pending_id).await;
    assert!(cancelled
        .html
        .contains("This run was cancelled and has no results."));
    assert!(!cancelled.html.contains("<svg"));

    // The exact sweep: by start (2 values of s), against s, 4 heatmaps (2 s x 2 starts).
    let exact = app.succeeded(&exact_job(), FINISH).await;
    let exact_id = exact["id"].as_str().unwrap();
    let exact_report = report(&app, exact_id).await;
    let mut exact_charts = ids("chart-by-start", 2);
    exact_charts.push("chart-against-s".to_owned());
    exact_charts.extend(ids("chart-sensitivity", 4));
    check_html(&exact_report.html, &exact, &exact_charts);
    assert!(exact_report
        .html
        .contains("exact derivatives (adjoint solves"));
    assert!(exact_report
        .html
        .contains("raw flows (row = from, column = to)"));
    assert!(
        !exact_report.html.contains("id=\"arrival\""),
        "exact runs have no arrival times"
    );

    // The ensemble sweep: by start, against s, arrival and heatmaps for 2 s x 2 starts.
    let ensemble = app.succeeded(&ensemble_job(), FINISH).await;
    assert!(ensemble["sensitivity"]
        .as_array()
        .unwrap()
        .iter()
        .any(|r| r["method"] == "ensemble_paired_secant"));
    let ensemble_id = ensemble["id"].as_str().unwrap();
    let ensemble_report = report(&app, ensemble_id).await;
    let mut ensemble_charts = ids("chart-by-start", 2);
    ensemble_charts.push("chart-against-s".to_owned());
    ensemble_charts.extend(ids("chart-arrival", 4));
    ensemble_charts.extend(ids("chart-sensitivity", 4));
    check_html(&ensemble_report.html, &ensemble, &ensemble_charts);
    let html = &ensemble_report.html;
    assert!(
        html.contains("Fictional archipelago &lt;test&gt;"),
        "the label, escaped"
    );
    assert!(html.contains("strong_migration (inside its valid regime"));
    assert!(html.contains("ensemble_paired_secant"));
    assert!(html.contains("one generation = 5 days"));

    // Finished runs never change: a strong tag, and 304 for it.
    let again = report(&app, ensemble_id).await;
    assert_eq!(again.etag, ensemble_report.etag);
    assert_eq!(
        again.html, ensemble_report.html,
        "the same bytes every time"
    );
    assert_ne!(again.etag, exact_report.etag);
    let res = app
        .client
        .get(app.url(&format!("/v1/runs/{ensemble_id}/report")))
        .header("If-None-Match", &ensemble_report.etag)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 304);
    app.stop().await;

    // In the browser.
    let browser = match chromium() {
        Ok(b) => b,
        Err(why) if std::env::var_os("CI").is_some() => {
            panic!("CI is set and the browser check cannot run: {why}")
        }
        Err(why) => {
            eprintln!("skipping the headless Chromium part: {why}");
            return;
        }
    };
    let dir = TempDir::new("report");
    check_in_browser(&browser, &dir.0, "exact", &exact_report.html).await;
    check_in_browser(&browser, &dir.0, "ensemble", html).await;
    // The console check can fail: a page that tries to load an image gets a message.
    let tampered = html.replacen(
        "</main>",
        "<img src=\"http://127.0.0.1:9/x.png\"></main>",
        1,
    );
    let page = dir.0.join("tampered.html");
    std::fs::write(&page, tampered).unwrap();
    let rendered = run_chromium(&browser, &page, "--dump-dom", 1200).await;
    assert!(
        rendered
            .console
            .iter()
            .any(|l| l.contains("Content Security Policy")),
        "a blocked load is reported on the console: {:?}",
        rendered.console
    );
    if let Some(shot) = std::env::var_os("DEMEFIX_REPORT_SCREENSHOT") {
        let page = dir.0.join("ensemble.html");
        let shot = PathBuf::from(shot);
        let mode = format!("--screenshot={}", shot.display());
        let rendered = run_chromium(&browser, &page, &mode, 4200).await;
        assert!(rendered.console.is_empty(), "{:?}", rendered.console);
        let png = std::fs::read(&shot).expect("the screenshot is written");
        assert!(png.starts_with(b"\x89PNG"), "a PNG file");
    }
}
