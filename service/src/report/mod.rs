//! The visual report of one run: a self-contained HTML page (inline style sheet, inline SVG
//! charts drawn with `plotters`; no scripts, fonts, images or addresses to fetch) rendered
//! from the run document (`api.md`, "A run").
//!
//! This module owns what the page shows and how: the header an auditor matches against the
//! run (id, status, hashes, seed, method and method version), the model assumptions and the
//! caution, and the charts, each only when the run has its data —
//!
//! 1. fixation probability by start with its 95% interval against the well-mixed reference,
//!    one chart per `s` (at most [`MAX_S_CHARTS`]);
//! 2. fixation probability against `s`, one curve per start, when the job sweeps `s`;
//! 3. first-arrival time per deme (medians, means when given, 5%-95% bars);
//! 4. link effects (`sensitivity`) as a source × target heatmap with a colour legend, and the
//!    links ranked beside it;
//! 5. the change report between two runs ([`changes_section`]), when the caller has one;
//!
//! then tables of the what-if rows (`interventions`, `plan`), every result, and the warnings.
//! It is pure: no I/O, no actix, no clock; the same document gives the same bytes.

mod changes;
mod charts;
mod html;
mod read;

pub use changes::changes_section;

use html::{esc, figure, interval, num, opt_num, Cell, Table};
use read::{array_at, f64_at, str_at, LinkRow, ModelFacts, ResultRow};
use serde_json::Value;
use std::collections::BTreeMap;
use std::fmt::Write as _;

/// Said in every caption and at the top of the page.
pub const CAUTION: &str = "These are model estimates for planning, not forecasts: they hold \
only under the model assumptions stated here, for the matrix and parameters supplied. Decisions \
rest with the responsible public-health authorities and must follow local regulations.";

/// [`CAUTION`] as markup (it has no character to escape).
pub(crate) const CAUTION_HTML: &str = CAUTION;

/// Most charts of section 1 (one per `s`), heatmaps and arrival charts.
pub const MAX_S_CHARTS: usize = 6;
/// Most starts in one chart of section 1, and curves in section 2.
const MAX_STARTS: usize = 40;
/// Most curves in the chart against `s`.
const MAX_CURVES: usize = 8;
/// Largest number of demes drawn as a heatmap (beyond it, the ranked table only).
const MAX_HEATMAP_DEMES: usize = 40;
/// Links listed beside each heatmap.
const RANKED_LINKS: usize = 10;
/// Most rows of the results and what-if tables.
const MAX_TABLE_ROWS: usize = 500;

/// Renders the report of `run` (the run document as `GET /v1/runs/{id}` serves it, or as
/// `demefix run` prints it), with the change-report section when `changes` is given.
///
/// A run that has not succeeded gets a page that says where it is (and why it failed), with
/// its header; the HTTP route answers 409 for runs that are not finished instead of calling
/// this.
pub fn render(run: &Value, changes: Option<&Value>) -> String {
    let facts = ModelFacts::of(run.get("spec").unwrap_or(&Value::Null));
    let status = status_of(run);
    let mut body = String::new();
    body.push_str(&header(run, &facts, status));
    if status != "succeeded" {
        body.push_str(&unfinished(run, status));
        return page(run, &body);
    }
    body.push_str(&caution_box(run, &facts));
    let results = ResultRow::all(array_at(run, "results"));
    let links = LinkRow::all(array_at(run, "sensitivity"));
    // (anchor, title, section): a chart section without data is named in the contents as
    // absent; the other sections are listed only when present.
    let charted = [
        (
            "by-start",
            "Fixation probability by start",
            section_by_start(&results, &facts),
        ),
        (
            "against-s",
            "Fixation probability against s",
            section_against_s(&results, &facts),
        ),
        (
            "arrival",
            "Arrival time per deme",
            section_arrival(&results, &facts),
        ),
        (
            "sensitivity",
            "Links ranked by their effect",
            section_sensitivity(&links, &results, &facts),
        ),
    ];
    let optional = [
        (
            "changes",
            "Changes since the previous run",
            changes.map(|doc| changes::section(doc, Some(&facts))),
        ),
        (
            "what-if",
            "What-if scenarios and plan",
            section_whatif(run, &facts),
        ),
        ("results", "Every result", Some(section_results(&results))),
        ("warnings", "Warnings", section_warnings(run)),
    ];
    let mut contents = Vec::new();
    let mut sections = String::new();
    for (id, title, section) in charted {
        contents.push(entry(id, title, section.is_some()));
        sections.push_str(&section.unwrap_or_default());
    }
    for (id, title, section) in optional {
        if let Some(section) = section {
            contents.push(entry(id, title, true));
            sections.push_str(&section);
        }
    }
    let _ = write!(
        body,
        "<nav><h2>In this report</h2>\n<ul>\n{}\n</ul></nav>\n{sections}",
        contents.join("\n")
    );
    page(run, &body)
}

/// `status`, or `succeeded` for a document with results and no status (`demefix run`).
fn status_of(run: &Value) -> &str {
    match str_at(run, "status") {
        Some(s) => s,
        None if run.get("results").is_some() => "succeeded",
        None => "unknown",
    }
}

/// One line of the contents: a link, or the title with a note when the run has no data for it.
fn entry(id: &str, title: &str, present: bool) -> String {
    if present {
        format!("<li><a href=\"#{id}\">{}</a></li>", esc(title))
    } else {
        format!(
            "<li>{} <span class=\"note\">— not in this run (no data for it)</span></li>",
            esc(title)
        )
    }
}

fn page(run: &Value, body: &str) -> String {
    let id = str_at(run, "id").unwrap_or("(no id)");
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; \
         style-src 'unsafe-inline'; img-src data:\">\n\
         <link rel=\"icon\" href=\"data:,\">\n\
         <title>demefix run {}</title>\n<style>\n{}</style>\n</head>\n<body>\n<main>\n{body}\
         <footer>Rendered by demefix {} from the run document. The page is self-contained: \
         no scripts, fonts, style sheets or images are loaded from anywhere.</footer>\n\
         </main>\n</body>\n</html>\n",
        esc(id),
        html::STYLE,
        env!("CARGO_PKG_VERSION"),
    )
}

fn header(run: &Value, facts: &ModelFacts, status: &str) -> String {
    let mut out = String::from("<header>\n<h1>Run report</h1>\n");
    if let Some(label) = &facts.label {
        let _ = writeln!(out, "<p class=\"label\">{}</p>", esc(label));
    }
    let mut dl = String::new();
    let mut fact = |name: &str, value: String| {
        let _ = write!(dl, "<dt>{}</dt><dd>{value}</dd>", esc(name));
    };
    let hash = |v: &str| format!("<span class=\"hash\">{}</span>", esc(v));
    fact(
        "run id",
        hash(str_at(run, "id").unwrap_or("(not from the service)")),
    );
    fact(
        "status",
        format!("<span class=\"status\">{}</span>", esc(status)),
    );
    if let Some(series) = &facts.series {
        fact("series", esc(series));
    }
    for (name, key) in [("submitted", "submitted_at"), ("finished", "finished_at")] {
        if let Some(t) = str_at(run, key) {
            fact(name, esc(t));
        }
    }
    if let Some(r) = str_at(run, "reused_from") {
        fact("results reused from run", hash(r));
    }
    let p = run.get("provenance").unwrap_or(&Value::Null);
    for key in [
        "spec_sha256",
        "matrix_sha256",
        "normalised_matrix_sha256",
        "request_sha256",
    ] {
        if let Some(v) = str_at(p, key) {
            fact(key, hash(v));
        }
    }
    match p.get("seed") {
        Some(Value::Number(n)) => fact("seed", hash(&n.to_string())),
        _ => {
            if let Some(seed) = run.pointer("/spec/method/seed").and_then(Value::as_u64) {
                fact("seed (from the spec)", hash(&seed.to_string()));
            }
        }
    }
    for key in [
        "method",
        "method_version",
        "service_version",
        "rng",
        "computed_at",
    ] {
        if let Some(v) = str_at(p, key) {
            fact(key, esc(v));
        }
    }
    if let (Some(host), Some(threads)) =
        (str_at(p, "host"), p.get("threads").and_then(Value::as_u64))
    {
        fact("computed on", format!("{}, {threads} threads", esc(host)));
    }
    let _ = writeln!(out, "<dl class=\"facts\">{dl}</dl>\n</header>");
    out
}

fn unfinished(run: &Value, status: &str) -> String {
    let mut out = String::from("<section class=\"caution\">\n<h2>No results to show</h2>\n");
    match status {
        "queued" | "running" => {
            let done = run.pointer("/progress/done").and_then(Value::as_u64);
            let total = run.pointer("/progress/total").and_then(Value::as_u64);
            let _ = write!(
                out,
                "<p>This run is {}: its report is written once it has finished.",
                esc(status)
            );
            if let (Some(d), Some(t)) = (done, total) {
                let _ = write!(out, " Progress: {d} of {t}.");
            }
            out.push_str("</p>\n");
        }
        "failed" => {
            let _ = writeln!(
                out,
                "<p>This run failed and has no results. Reason: {}</p>",
                esc(str_at(run, "error").unwrap_or("not recorded"))
            );
        }
        "cancelled" => out.push_str("<p>This run was cancelled and has no results.</p>\n"),
        other => {
            let _ = writeln!(
                out,
                "<p>This run's status is {} and it has no results.</p>",
                esc(other)
            );
        }
    }
    let _ = writeln!(out, "<p>{CAUTION_HTML}</p>\n</section>");
    out
}

fn rule_text(rule: &str) -> &'static str {
    match rule {
        "death_birth" => {
            "death-birth: a uniformly chosen individual dies and a newborn replaces it, its \
             parent drawn through the recruitment matrix B (row = receiving deme) and by fitness"
        }
        "birth_death" => {
            "birth-death: a parent drawn by fitness over the whole population places its \
             offspring through the dispersal matrix F (row = sending deme), replacing a \
             uniformly chosen individual there"
        }
        "wright_fisher" => {
            "Wright-Fisher: every generation each deme is refilled by binomial sampling, \
             parents drawn through the recruitment matrix B and by fitness"
        }
        _ => "an update rule this report does not describe",
    }
}

fn scope_text(scope: &str, rule: Option<&str>) -> String {
    if rule == Some("birth_death") {
        return "selection scope does not apply to birth-death (its parent is chosen over the \
                whole population)"
            .to_owned();
    }
    match scope {
        "deme" => "selection scope deme (soft selection: a variant competes only with the \
                   residents of its own deme)"
            .to_owned(),
        "neighbourhood" => "selection scope neighbourhood (every candidate parent that the \
                            recruitment reaches competes)"
            .to_owned(),
        other => format!("selection scope {}", esc(other)),
    }
}

fn orientation_text(facts: &ModelFacts) -> String {
    let base = match facts.orientation.as_deref() {
        Some("recruitment") => "a recruitment matrix (row = receiving deme, column = the deme \
                                its newborns' parents come from)"
            .to_owned(),
        Some("dispersal") => {
            "a dispersal matrix (row = sending deme, column = where its offspring go)".to_owned()
        }
        Some("flows") => format!(
            "raw flows (row = from, column = to), normalised into the rule's matrix{}",
            match facts.self_flows.as_deref() {
                Some("keep") | None => ", the diagonal kept as sent".to_owned(),
                Some(p) => format!(", with local retention {}", esc(p)),
            }
        ),
        Some(other) => format!("orientation {}", esc(other)),
        None => "an orientation the spec does not state".to_owned(),
    };
    format!("migration sent as {base}, fixed over the period analysed")
}

fn sizes_text(facts: &ModelFacts) -> String {
    let m = facts.demes.len();
    let total: u64 = facts.demes.iter().filter_map(|d| d.1).sum();
    let shown: Vec<String> = facts
        .demes
        .iter()
        .take(12)
        .map(|(id, n)| {
            format!(
                "{} {}",
                esc(id),
                n.map_or("?".to_owned(), |n| n.to_string())
            )
        })
        .collect();
    let more = if m > 12 {
        format!(" and {} more", m - 12)
    } else {
        String::new()
    };
    format!(
        "{m} demes of fixed sizes ({}{more}; N = {total})",
        shown.join(", ")
    )
}

fn time_text(facts: &ModelFacts) -> String {
    let unit = match facts.rule.as_deref() {
        Some("wright_fisher") => "time in generations",
        _ => "time in generations (events divided by N)",
    };
    match facts.generation_days {
        Some(d) => format!("{unit}; one generation = {} days", num(d)),
        None => unit.to_owned(),
    }
}

/// The assumptions in one sentence, for captions.
fn assumptions(facts: &ModelFacts) -> String {
    let rule = facts.rule.as_deref().unwrap_or("unknown");
    format!(
        "Model: {} update rule, {}; {}; {}; one new variant of constant relative fitness \
         1 + s, no further mutation; {}.",
        esc(rule),
        scope_text(
            facts.scope.as_deref().unwrap_or("deme"),
            facts.rule.as_deref()
        ),
        orientation_text(facts),
        sizes_text(facts),
        time_text(facts)
    )
}

fn caution_box(run: &Value, facts: &ModelFacts) -> String {
    let rule = facts.rule.as_deref().unwrap_or("unknown");
    let mut out =
        String::from("<section class=\"caution\" id=\"caution\">\n<h2>Read this first</h2>\n");
    match str_at(run, "disclaimer") {
        Some(d) => {
            let _ = writeln!(out, "<p>{}</p>", esc(d));
        }
        None => {
            let _ = writeln!(out, "<p>{CAUTION_HTML}</p>");
        }
    }
    let _ = writeln!(
        out,
        "<p><b>Model assumptions.</b> Haploid individuals of two types; {}; {}; {}; {}; one \
         new variant of constant relative fitness 1 + s everywhere (no frequency dependence, \
         no extinction or recolonisation of demes), no further mutation; the dying individual \
         may be the parent; {}.</p>\n</section>",
        rule_text(rule),
        scope_text(
            facts.scope.as_deref().unwrap_or("deme"),
            facts.rule.as_deref()
        ),
        orientation_text(facts),
        sizes_text(facts),
        time_text(facts)
    );
    out
}

/// A caption: what the chart shows (markup), then the assumptions and the caution.
fn caption(what: &str, facts: &ModelFacts) -> String {
    format!("{what} {} <b>{CAUTION_HTML}</b>", assumptions(facts))
}

fn chart_or_note(out: &mut String, id: &str, chart: Result<String, String>, caption: &str) {
    match chart {
        Ok(svg) => out.push_str(&figure(id, &svg, caption)),
        Err(why) => {
            let _ = writeln!(out, "<p class=\"note\">No chart: {}.</p>", esc(&why));
        }
    }
}

fn method_text(method: &str) -> String {
    if method == "exact" {
        "exact (the Markov chain solved; no interval)".to_owned()
    } else if method.starts_with("ensemble") {
        format!(
            "{} (seeded replicates; bars are the reported 95% intervals)",
            esc(method)
        )
    } else if let Some(name) = method.strip_prefix("approximation:") {
        format!(
            "the screening approximation {} (no interval; see its valid regime in the \
             results)",
            esc(name)
        )
    } else {
        esc(method)
    }
}

fn s_values(results: &[ResultRow]) -> Vec<f64> {
    read::distinct_s(results.iter().map(|r| &r.s))
}

fn section_by_start(results: &[ResultRow], facts: &ModelFacts) -> Option<String> {
    if results.is_empty() {
        return None;
    }
    let all_s = s_values(results);
    let picked = read::evenly(all_s.len(), MAX_S_CHARTS);
    let mut out =
        String::from("<section id=\"by-start\">\n<h2>1. Fixation probability by start</h2>\n");
    if picked.len() < all_s.len() {
        let _ = writeln!(
            out,
            "<p class=\"note\">{} of the {} values of s are shown here (evenly spread); the \
             chart against s and the results table show them all.</p>",
            picked.len(),
            all_s.len()
        );
    }
    for (k, &i) in picked.iter().enumerate() {
        let s = all_s[i];
        let rows: Vec<&ResultRow> = results.iter().filter(|r| r.s == s).collect();
        let points: Vec<charts::StartPoint> = rows
            .iter()
            .take(MAX_STARTS)
            .map(|r| charts::StartPoint {
                label: r.start.clone(),
                p: r.fixation_probability,
                ci95: r.ci95,
            })
            .collect();
        let well_mixed = rows.iter().find_map(|r| r.well_mixed);
        let wm_method = rows
            .iter()
            .find_map(|r| r.well_mixed_method.clone())
            .unwrap_or_else(|| "well-mixed".to_owned());
        let methods: Vec<String> = {
            let mut m: Vec<String> = rows.iter().map(|r| r.method.clone()).collect();
            m.dedup();
            m
        };
        let what = format!(
            "<b>Fixation probability of one new variant by where it starts, s = {}</b>{}. \
             Method: {}. Dots: estimates; bars: their 95% interval where the method gives one. \
             Dashed line: the fixation probability in a single well-mixed population of the \
             same total size ({} formula{}); a start above it means the structure amplifies \
             selection for that start, below it that it suppresses it.",
            num(s),
            if rows.len() > MAX_STARTS {
                format!(" (the first {MAX_STARTS} of {} starts)", rows.len())
            } else {
                String::new()
            },
            methods
                .iter()
                .map(|m| method_text(m))
                .collect::<Vec<_>>()
                .join("; "),
            esc(&wm_method),
            well_mixed.map_or(String::new(), |w| format!(", {}", num(w)))
        );
        let _ = writeln!(out, "<h3>s = {}</h3>", num(s));
        chart_or_note(
            &mut out,
            &format!("chart-by-start-{k}"),
            charts::fixation_by_start(&points, well_mixed),
            &caption(&what, facts),
        );
    }
    out.push_str("</section>\n");
    Some(out)
}

fn section_against_s(results: &[ResultRow], facts: &ModelFacts) -> Option<String> {
    let all_s = s_values(results);
    if all_s.len() < 2 {
        return None;
    }
    let mut starts: Vec<&str> = Vec::new();
    for r in results {
        if !starts.contains(&r.start.as_str()) {
            starts.push(&r.start);
        }
    }
    let shown: Vec<&str> = starts.iter().copied().take(MAX_CURVES).collect();
    let curves: Vec<charts::SCurve> = shown
        .iter()
        .map(|start| {
            let mut points: Vec<charts::SPoint> = results
                .iter()
                .filter(|r| r.start == *start)
                .map(|r| (r.s, r.fixation_probability, r.ci95))
                .collect();
            points.sort_by(|a, b| a.0.total_cmp(&b.0));
            charts::SCurve {
                label: (*start).to_owned(),
                points,
            }
        })
        .collect();
    let mut well_mixed: Vec<(f64, f64)> = all_s
        .iter()
        .filter_map(|&s| {
            let w = results.iter().find(|r| r.s == s)?.well_mixed?;
            Some((s, w))
        })
        .collect();
    well_mixed.sort_by(|a, b| a.0.total_cmp(&b.0));
    let what = format!(
        "<b>Fixation probability against the selection coefficient s</b>, one line per start \
         ({} values of s{}); bars: 95% intervals where the method gives them. Dashed line: the \
         well-mixed reference of the same total size. Points are joined by straight lines for \
         reading only: values between the computed s are not estimated.",
        all_s.len(),
        if starts.len() > shown.len() {
            format!("; the first {} of {} starts", shown.len(), starts.len())
        } else {
            String::new()
        }
    );
    let mut out =
        String::from("<section id=\"against-s\">\n<h2>2. Fixation probability against s</h2>\n");
    chart_or_note(
        &mut out,
        "chart-against-s",
        charts::fixation_against_s(&curves, &well_mixed),
        &caption(&what, facts),
    );
    out.push_str("</section>\n");
    Some(out)
}

/// Which `(s, start)` pairs get their own chart: all when few, else the primary start at
/// evenly spread values of `s`.
fn chosen_pairs(pairs: &[(f64, String)]) -> Vec<(f64, String)> {
    if pairs.len() <= MAX_S_CHARTS {
        return pairs.to_vec();
    }
    let starts: Vec<&str> = {
        let mut v: Vec<&str> = Vec::new();
        for (_, st) in pairs {
            if !v.contains(&st.as_str()) {
                v.push(st);
            }
        }
        v
    };
    let primary = read::primary_start(&starts).unwrap_or_default().to_owned();
    let of_primary: Vec<&(f64, String)> = pairs.iter().filter(|p| p.1 == primary).collect();
    read::evenly(of_primary.len(), MAX_S_CHARTS)
        .into_iter()
        .map(|i| of_primary[i].clone())
        .collect()
}

fn fraction_order(a: &str, b: &str) -> std::cmp::Ordering {
    match (a.parse::<f64>(), b.parse::<f64>()) {
        (Ok(x), Ok(y)) => x.total_cmp(&y),
        _ => a.cmp(b),
    }
}

fn section_arrival(results: &[ResultRow], facts: &ModelFacts) -> Option<String> {
    let with: Vec<&ResultRow> = results
        .iter()
        .filter(|r| !r.arrival_generations.is_empty() || !r.arrival_days.is_empty())
        .collect();
    if with.is_empty() {
        return None;
    }
    let pairs: Vec<(f64, String)> = with.iter().map(|r| (r.s, r.start.clone())).collect();
    let chosen = chosen_pairs(&pairs);
    let mut out = String::from("<section id=\"arrival\">\n<h2>3. Arrival time per deme</h2>\n");
    if chosen.len() < pairs.len() {
        let _ = writeln!(
            out,
            "<p class=\"note\">{} of the {} (s, start) pairs with arrival times are drawn; the \
             run document has them all.</p>",
            chosen.len(),
            pairs.len()
        );
    }
    for (k, (s, start)) in chosen.iter().enumerate() {
        let Some(r) = with.iter().find(|r| r.s == *s && &r.start == start) else {
            continue;
        };
        let (table, unit, mean) = if r.arrival_days.is_empty() {
            (
                &r.arrival_generations,
                "generations",
                r.mean_fixation_generations,
            )
        } else {
            (&r.arrival_days, "days", r.mean_fixation_days)
        };
        let mut demes: Vec<String> = facts
            .deme_ids()
            .into_iter()
            .filter(|d| table.iter().any(|(x, _)| x == d))
            .map(str::to_owned)
            .collect();
        for (d, _) in table {
            if !demes.contains(d) {
                demes.push(d.clone());
            }
        }
        let mut fractions: Vec<String> = Vec::new();
        for (_, by_fraction) in table {
            for (f, _) in by_fraction {
                if !fractions.contains(f) {
                    fractions.push(f.clone());
                }
            }
        }
        fractions.sort_by(|a, b| fraction_order(a, b));
        let values = demes
            .iter()
            .map(|d| {
                let row = table.iter().find(|(x, _)| x == d).map(|(_, v)| v);
                fractions
                    .iter()
                    .map(|f| row.and_then(|v| v.iter().find(|(g, _)| g == f).map(|(_, a)| *a)))
                    .collect()
            })
            .collect();
        let what = format!(
            "<b>When the variant first reaches each deme, s = {}, start {}</b>: for each \
             arrival fraction (the share of the deme that carries the variant), the median \
             first time over the replicates that fixed, with bars from the 5% to the 95% \
             quantile{}; in {}. Dashed line: the mean time to fixation of the whole \
             population, for scale.",
            num(*s),
            esc(start),
            if r.replicates.is_some() {
                format!(" ({} replicates in all)", r.replicates.unwrap_or(0))
            } else {
                String::new()
            },
            unit
        );
        let _ = writeln!(out, "<h3>s = {}, start {}</h3>", num(*s), esc(start));
        chart_or_note(
            &mut out,
            &format!("chart-arrival-{k}"),
            charts::arrival_by_deme(&charts::ArrivalChart {
                demes,
                fractions,
                values,
                unit,
                mean_fixation: mean,
            }),
            &caption(&what, facts),
        );
    }
    out.push_str("</section>\n");
    Some(out)
}

fn link_method_text(method: &str) -> String {
    match method {
        "exact_adjoint" => "exact derivatives (adjoint solves of the exact chain)".to_owned(),
        "ensemble_paired_secant" => "paired ensembles (a secant over half the link, with a \
                                     95% interval)"
            .to_owned(),
        m => match m.strip_prefix("approximation:") {
            Some(name) => format!("the gradient of the screening approximation {}", esc(name)),
            None => esc(m),
        },
    }
}

/// The method a heatmap shows for one `(s, start)`: the exact adjoint when present, else the
/// gradient of the first screening approximation inside its valid regime for that result,
/// else the method with the most rows (first seen on a tie). Returns the method and, for an
/// approximation, whether it is inside its regime.
fn heatmap_method(rows: &[&LinkRow], result: Option<&ResultRow>) -> Option<(String, Option<bool>)> {
    let has = |m: &str| rows.iter().any(|r| r.method == m);
    if has("exact_adjoint") {
        return Some(("exact_adjoint".to_owned(), None));
    }
    let regimes: &[(String, bool)] = result.map_or(&[], |r| r.approximations.as_slice());
    let inside_of = |method: &str| {
        let name = method.strip_prefix("approximation:")?;
        regimes.iter().find(|(n, _)| n == name).map(|(_, i)| *i)
    };
    if let Some((name, _)) = regimes
        .iter()
        .find(|(n, inside)| *inside && has(&format!("approximation:{n}")))
    {
        return Some((format!("approximation:{name}"), Some(true)));
    }
    let mut counts: Vec<(String, usize)> = Vec::new();
    for r in rows {
        match counts.iter_mut().find(|(m, _)| *m == r.method) {
            Some((_, n)) => *n += 1,
            None => counts.push((r.method.clone(), 1)),
        }
    }
    let best = counts.iter().map(|c| c.1).max()?;
    let method = counts.into_iter().find(|c| c.1 == best)?.0;
    let inside = inside_of(&method);
    Some((method, inside))
}

fn section_sensitivity(
    links: &[LinkRow],
    results: &[ResultRow],
    facts: &ModelFacts,
) -> Option<String> {
    if links.is_empty() {
        return None;
    }
    let mut pairs: Vec<(f64, String)> = Vec::new();
    for l in links {
        if !pairs.iter().any(|p| p.0 == l.s && p.1 == l.start) {
            pairs.push((l.s, l.start.clone()));
        }
    }
    let chosen = chosen_pairs(&pairs);
    let mut demes: Vec<String> = facts.deme_ids().into_iter().map(str::to_owned).collect();
    for l in links {
        for d in [&l.from, &l.to] {
            if !demes.contains(d) {
                demes.push(d.clone());
            }
        }
    }
    let index: BTreeMap<&str, usize> = demes
        .iter()
        .enumerate()
        .map(|(i, d)| (d.as_str(), i))
        .collect();
    let mut out = String::from(
        "<section id=\"sensitivity\">\n<h2>4. Links ranked by their effect on the fixation \
         probability</h2>\n",
    );
    if chosen.len() < pairs.len() {
        let _ = writeln!(
            out,
            "<p class=\"note\">{} of the {} (s, start) pairs with link effects are drawn; the \
             run document's <code>sensitivity</code> has them all.</p>",
            chosen.len(),
            pairs.len()
        );
    }
    let matrix_of = match facts.rule.as_deref() {
        Some("birth_death") => "the dispersal matrix F",
        _ => "the recruitment matrix B",
    };
    for (k, (s, start)) in chosen.iter().enumerate() {
        let rows: Vec<&LinkRow> = links
            .iter()
            .filter(|l| l.s == *s && &l.start == start)
            .collect();
        let result = results.iter().find(|r| r.s == *s && &r.start == start);
        let Some((method, inside)) = heatmap_method(&rows, result) else {
            continue;
        };
        let regime = match inside {
            Some(true) => " (inside its valid regime for this s and start)",
            Some(false) => " (outside its valid regime for this s and start: a rough ranking only)",
            None if method.starts_with("approximation:") => {
                " (check its valid regime in the results)"
            }
            None => "",
        };
        let _ = writeln!(out, "<h3>s = {}, start {}</h3>", num(*s), esc(start));
        let main: Vec<&&LinkRow> = rows.iter().filter(|r| r.method == method).collect();
        if demes.len() <= MAX_HEATMAP_DEMES {
            let cells: Vec<(usize, usize, f64)> = main
                .iter()
                .filter_map(|r| {
                    Some((
                        *index.get(r.from.as_str())?,
                        *index.get(r.to.as_str())?,
                        r.d_fixation_probability,
                    ))
                })
                .collect();
            let what = format!(
                "<b>Effect of each movement link on the fixation probability, s = {}, start \
                 {}</b>, from {}{regime}. Row: the source deme (the lineage moves from it); column: the \
                 target deme (it moves to it). Colour: the change of the fixation probability \
                 per unit of probability moved from the link to its row's local retention in \
                 {matrix_of} (rows kept stochastic); blue: reducing the link lowers the \
                 fixation probability, orange: it raises it; grey: no value (the diagonal, or \
                 no link). The colour bar is the legend; its scale is symmetric about 0.",
                num(*s),
                esc(start),
                link_method_text(&method)
            );
            chart_or_note(
                &mut out,
                &format!("chart-sensitivity-{k}"),
                charts::sensitivity_heatmap(&demes, &cells),
                &caption(&what, facts),
            );
        } else {
            let _ = writeln!(
                out,
                "<p class=\"note\">{} demes are too many for a readable heatmap; the ranked \
                 links below are the report's view.</p>",
                demes.len()
            );
        }
        let mut ranked: Vec<&LinkRow> = main.iter().map(|r| **r).collect();
        ranked.sort_by(|a, b| {
            a.d_fixation_probability
                .total_cmp(&b.d_fixation_probability)
        });
        ranked.truncate(RANKED_LINKS);
        ranked.extend(
            rows.iter()
                .copied()
                .filter(|r| r.method != method && r.ci95.is_some()),
        );
        let mut table = Table::new(&[
            "rank",
            "from (source)",
            "to (target)",
            "effect on fixation probability",
            "95% interval",
            "method",
        ]);
        for (i, r) in ranked.iter().enumerate() {
            table.row(
                vec![
                    Cell::Num(if r.method == method {
                        (i + 1).to_string()
                    } else {
                        "—".to_owned()
                    }),
                    Cell::Text(r.from.clone()),
                    Cell::Text(r.to.clone()),
                    Cell::Num(num(r.d_fixation_probability)),
                    Cell::Num(interval(r.ci95)),
                    Cell::Text(r.method.clone()),
                ],
                false,
            );
        }
        let _ = writeln!(
            out,
            "<p class=\"note\">The {} links ranked by their effect (by {}), the one whose \
             reduction lowers the fixation probability most first; then any paired-ensemble \
             rows with their intervals.</p>",
            RANKED_LINKS.min(main.len()),
            esc(&method)
        );
        out.push_str(&table.html());
    }
    out.push_str("</section>\n");
    Some(out)
}

fn section_whatif(run: &Value, facts: &ModelFacts) -> Option<String> {
    let interventions = array_at(run, "interventions");
    let plan = run.get("plan").filter(|p| p.is_object());
    if interventions.is_empty() && plan.is_none() {
        return None;
    }
    let mut out = String::from("<section id=\"what-if\">\n<h2>What-if scenarios and plan</h2>\n");
    let _ = writeln!(
        out,
        "<p class=\"note\">Each change moves probability between a link of the rule's matrix \
         and its row's local retention. {} {CAUTION_HTML}</p>",
        assumptions(facts)
    );
    if !interventions.is_empty() {
        let mut t = Table::new(&[
            "scenario",
            "s",
            "start",
            "method",
            "baseline",
            "scenario value",
            "change",
            "95% interval of the change",
        ]);
        for r in interventions.iter().take(MAX_TABLE_ROWS) {
            t.row(
                vec![
                    Cell::Text(str_at(r, "name").unwrap_or("—").to_owned()),
                    Cell::Num(opt_num(f64_at(r, "s"))),
                    Cell::Text(str_at(r, "start").unwrap_or("—").to_owned()),
                    Cell::Text(str_at(r, "method").unwrap_or("—").to_owned()),
                    Cell::Num(opt_num(f64_at(r, "baseline_fixation_probability"))),
                    Cell::Num(opt_num(f64_at(r, "scenario_fixation_probability"))),
                    Cell::Num(opt_num(f64_at(r, "change_fixation_probability"))),
                    Cell::Num(interval(read::pair_at(r, "change_ci95"))),
                ],
                false,
            );
        }
        out.push_str("<h3>Scenarios: fixation probability against the baseline</h3>\n");
        out.push_str(&t.html());
    }
    if let Some(plan) = plan {
        out.push_str("<h3>Greedy plan of link reductions</h3>\n<dl class=\"facts\">");
        for (name, key) in [
            ("s", "s"),
            ("budget (share of flow)", "budget"),
            ("baseline objective", "baseline_objective"),
            ("budget used", "budget_used"),
        ] {
            if let Some(x) = f64_at(plan, key) {
                let _ = write!(out, "<dt>{}</dt><dd>{}</dd>", esc(name), num(x));
            }
        }
        for key in ["method", "objective", "stop_reason", "limits"] {
            if let Some(x) = str_at(plan, key) {
                let _ = write!(out, "<dt>{}</dt><dd>{}</dd>", esc(key), esc(x));
            }
        }
        out.push_str("</dl>\n");
        let mut t = Table::new(&[
            "step",
            "from",
            "to",
            "amount",
            "closed",
            "budget used",
            "objective before",
            "objective after",
            "change",
            "95% interval",
        ]);
        for step in array_at(plan, "steps") {
            t.row(
                vec![
                    Cell::Num(
                        step.get("step")
                            .and_then(Value::as_u64)
                            .map_or("—".to_owned(), |n| n.to_string()),
                    ),
                    Cell::Text(str_at(step, "from").unwrap_or("—").to_owned()),
                    Cell::Text(str_at(step, "to").unwrap_or("—").to_owned()),
                    Cell::Num(opt_num(f64_at(step, "amount"))),
                    Cell::Text(match step.get("closed").and_then(Value::as_bool) {
                        Some(true) => "yes".to_owned(),
                        Some(false) => "partly".to_owned(),
                        None => "—".to_owned(),
                    }),
                    Cell::Num(opt_num(f64_at(step, "budget_used"))),
                    Cell::Num(opt_num(f64_at(step, "objective_before"))),
                    Cell::Num(opt_num(f64_at(step, "objective_after"))),
                    Cell::Num(opt_num(f64_at(step, "change"))),
                    Cell::Num(interval(read::pair_at(step, "change_ci95"))),
                ],
                false,
            );
        }
        if t.is_empty() {
            out.push_str("<p class=\"note\">The plan has no step.</p>\n");
        } else {
            out.push_str(&t.html());
        }
    }
    out.push_str("</section>\n");
    Some(out)
}

fn section_results(results: &[ResultRow]) -> String {
    let mut out = String::from("<section id=\"results\">\n<h2>Every result</h2>\n");
    if results.is_empty() {
        out.push_str("<p class=\"note\">The run document has no readable result.</p>\n");
        out.push_str("</section>\n");
        return out;
    }
    let mut t = Table::new(&[
        "s",
        "start",
        "method",
        "fixation probability",
        "95% interval",
        "well-mixed",
        "ratio",
        "mean fixation time, generations",
        "mean fixation time, days",
        "replicates",
    ]);
    for r in results.iter().take(MAX_TABLE_ROWS) {
        t.row(
            vec![
                Cell::Num(num(r.s)),
                Cell::Text(r.start.clone()),
                Cell::Text(r.method.clone()),
                Cell::Num(num(r.fixation_probability)),
                Cell::Num(interval(r.ci95)),
                Cell::Num(opt_num(r.well_mixed)),
                Cell::Num(opt_num(r.ratio)),
                Cell::Num(opt_num(r.mean_fixation_generations)),
                Cell::Num(opt_num(r.mean_fixation_days)),
                Cell::Num(r.replicates.map_or("—".to_owned(), |n| n.to_string())),
            ],
            false,
        );
    }
    out.push_str(&t.html());
    if results.len() > MAX_TABLE_ROWS {
        let _ = writeln!(
            out,
            "<p class=\"note\">{} more results are in the run document.</p>",
            results.len() - MAX_TABLE_ROWS
        );
    }
    out.push_str("</section>\n");
    out
}

fn section_warnings(run: &Value) -> Option<String> {
    let warnings: Vec<&str> = array_at(run, "warnings")
        .iter()
        .filter_map(Value::as_str)
        .collect();
    if warnings.is_empty() {
        return None;
    }
    let mut out =
        String::from("<section id=\"warnings\">\n<h2>Warnings</h2>\n<ul class=\"warnings\">\n");
    for w in warnings {
        let _ = writeln!(out, "<li>{}</li>", esc(w));
    }
    out.push_str("</ul>\n</section>\n");
    Some(out)
}

#[cfg(test)]
mod tests;
