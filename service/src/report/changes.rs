//! The change-report section: what moved between two runs of a series (the document the
//! series/changes endpoint produces), as a chart of the fixation-probability changes with
//! their intervals, a table of every quantity's change, and the matrix entries that changed.
//!
//! The document's shape (every member optional; anything missing is left out):
//!
//! ```json
//! {"series": "name", "from": {"run_id": "...", "as_of": "2026-11-30"},
//!  "to": {"run_id": "...", "as_of": "2026-12-01"}, "threshold": 0.01,
//!  "rows": [{"s": 0.02, "start": "deme-a",
//!            "fixation_probability": {"from": 0.1, "to": 0.12, "change": 0.02,
//!                                     "ci95": [0.01, 0.03], "flagged": true},
//!            "mean_fixation_time": {"from": 50.0, "to": 48.0, "change": -2.0,
//!                                   "ci95": [-3.0, -1.0], "flagged": false}}],
//!  "matrix_changes": [{"source": "deme-a", "target": "deme-b", "from": 0.1, "to": 0.2,
//!                      "change": 0.1}]}
//! ```

use super::charts::{self, ChangeBar};
use super::html::{esc, figure, interval, num, opt_num, Cell, Table};
use super::read::{array_at, f64_at, pair_at, str_at, ModelFacts};
use serde_json::Value;
use std::fmt::Write as _;

/// Most matrix entries listed; the rest are counted.
const MATRIX_ROWS: usize = 60;
/// Most bars in the chart; the table lists every row.
const CHART_BARS: usize = 40;

/// Human names of the quantities a row may carry; any other object member with a `change`
/// is shown under its own name.
fn quantity_name(key: &str) -> String {
    match key {
        "fixation_probability" => "fixation probability".to_owned(),
        "mean_fixation_time" => "mean fixation time".to_owned(),
        "mean_fixation_generations" => "mean fixation time, generations".to_owned(),
        "mean_fixation_days" => "mean fixation time, days".to_owned(),
        "mean_absorption_generations" => "mean absorption time, generations".to_owned(),
        other => other.replace('_', " "),
    }
}

fn run_side(doc: &Value, side: &str) -> Option<String> {
    let v = doc.get(side)?;
    let run = str_at(v, "run_id");
    let as_of = str_at(v, "as_of");
    match (run, as_of) {
        (None, None) => None,
        (Some(r), None) => Some(format!("run <span class=\"hash\">{}</span>", esc(r))),
        (None, Some(a)) => Some(format!("as of {}", esc(a))),
        (Some(r), Some(a)) => Some(format!(
            "run <span class=\"hash\">{}</span>, as of {}",
            esc(r),
            esc(a)
        )),
    }
}

fn row_label(row: &Value) -> String {
    let s = f64_at(row, "s").map(|s| format!("s = {}", num(s)));
    let start = str_at(row, "start").map(str::to_owned);
    match (s, start) {
        (Some(s), Some(t)) => format!("{s}, {t}"),
        (Some(s), None) => s,
        (None, Some(t)) => t,
        (None, None) => "(unnamed row)".to_owned(),
    }
}

/// The change-report section of `doc` (module docs for the shape), tolerant of missing
/// members: an empty or unexpected document gives a section that says it has nothing to show.
pub fn changes_section(doc: &Value) -> String {
    section(doc, None)
}

/// [`changes_section`], its caption stating the model assumptions of `facts` (the later
/// run's spec) when given.
pub(super) fn section(doc: &Value, facts: Option<&ModelFacts>) -> String {
    let mut out =
        String::from("<section id=\"changes\">\n<h2>Changes since the previous run</h2>\n");
    let mut listed = String::new();
    if let Some(series) = str_at(doc, "series") {
        let _ = write!(listed, "<dt>series</dt><dd>{}</dd>", esc(series));
    }
    if let Some(from) = run_side(doc, "from") {
        let _ = write!(listed, "<dt>from</dt><dd>{from}</dd>");
    }
    if let Some(to) = run_side(doc, "to") {
        let _ = write!(listed, "<dt>to</dt><dd>{to}</dd>");
    }
    let threshold = f64_at(doc, "threshold");
    if let Some(t) = threshold {
        let _ = write!(
            listed,
            "<dt>threshold</dt><dd>{} (a change is flagged when the change report marks it)</dd>",
            num(t)
        );
    }
    if !listed.is_empty() {
        let _ = writeln!(out, "<dl class=\"facts\">{listed}</dl>");
    }

    let rows = array_at(doc, "rows");
    let mut table = Table::new(&[
        "s",
        "start",
        "quantity",
        "from",
        "to",
        "change",
        "95% interval",
        "flagged",
    ]);
    let mut bars = Vec::new();
    for row in rows {
        let Some(members) = row.as_object() else {
            continue;
        };
        for (key, q) in members {
            // quantities only: numbers with a change (not e.g. the methods of the two sides)
            if !q.is_object() || (f64_at(q, "change").is_none() && f64_at(q, "from").is_none()) {
                continue;
            }
            let flagged = q.get("flagged").and_then(Value::as_bool).unwrap_or(false);
            let change =
                f64_at(q, "change").or_else(|| Some(f64_at(q, "to")? - f64_at(q, "from")?));
            let ci95 = pair_at(q, "ci95");
            table.row(
                vec![
                    Cell::Num(opt_num(f64_at(row, "s"))),
                    Cell::Text(str_at(row, "start").unwrap_or("—").to_owned()),
                    Cell::Text(quantity_name(key)),
                    Cell::Num(opt_num(f64_at(q, "from"))),
                    Cell::Num(opt_num(f64_at(q, "to"))),
                    Cell::Num(opt_num(change)),
                    Cell::Num(interval(ci95)),
                    Cell::Text(if flagged { "flagged" } else { "" }.to_owned()),
                ],
                flagged,
            );
            if key == "fixation_probability" {
                if let Some(change) = change {
                    bars.push(ChangeBar {
                        label: row_label(row),
                        change,
                        ci95,
                        flagged,
                    });
                }
            }
        }
    }
    if !bars.is_empty() {
        let shown = bars.len().min(CHART_BARS);
        let caption = format!(
            "<b>Change of the fixation probability from the earlier run to the later one</b>, \
             per (s, start), with its 95% interval; flagged changes in dark orange, dashed \
             lines at ± the threshold{}. Each side is a model estimate under its own run's \
             spec; a change mixes changes of the inputs (matrix, sizes) with estimation noise, \
             which the interval bounds only for the latter. {} <b>{}</b>",
            if shown < bars.len() {
                format!("; the first {shown} of {} rows", bars.len())
            } else {
                String::new()
            },
            match facts {
                Some(f) => super::assumptions(f),
                None => "Each run's report states its model assumptions.".to_owned(),
            },
            super::CAUTION_HTML
        );
        match charts::change_intervals(&bars[..shown], threshold) {
            Ok(svg) => out.push_str(&figure("chart-changes", &svg, &caption)),
            Err(why) => {
                let _ = writeln!(out, "<p class=\"note\">No chart: {}.</p>", esc(&why));
            }
        }
    }
    if table.is_empty() {
        out.push_str("<p class=\"note\">The change report lists no changed result.</p>\n");
    } else {
        out.push_str("<h3>Every quantity</h3>\n");
        out.push_str(&table.html());
    }

    let mut matrix: Vec<&Value> = array_at(doc, "matrix_changes").iter().collect();
    if !matrix.is_empty() {
        let size = |v: &Value| {
            f64_at(v, "change")
                .or_else(|| Some(f64_at(v, "to")? - f64_at(v, "from")?))
                .map_or(0.0, f64::abs)
        };
        matrix.sort_by(|a, b| size(b).total_cmp(&size(a)));
        let mut t = Table::new(&["source deme", "target deme", "from", "to", "change"]);
        for v in matrix.iter().take(MATRIX_ROWS) {
            t.row(
                vec![
                    Cell::Text(str_at(v, "source").unwrap_or("—").to_owned()),
                    Cell::Text(str_at(v, "target").unwrap_or("—").to_owned()),
                    Cell::Num(opt_num(f64_at(v, "from"))),
                    Cell::Num(opt_num(f64_at(v, "to"))),
                    Cell::Num(opt_num(f64_at(v, "change"))),
                ],
                false,
            );
        }
        out.push_str("<h3>Matrix entries that changed, largest first</h3>\n");
        out.push_str(&t.html());
        if matrix.len() > MATRIX_ROWS {
            let _ = writeln!(
                out,
                "<p class=\"note\">{} more entries changed; the change report lists them all.</p>",
                matrix.len() - MATRIX_ROWS
            );
        }
    }
    out.push_str("</section>\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn a_change_report_shows_its_runs_rows_flags_chart_and_matrix_entries() {
        let doc = json!({
            "series": "harbour-mobility",
            "from": {"run_id": "0193-a", "as_of": "2026-11-30"},
            "to": {"run_id": "0193-b", "as_of": "2026-12-01"},
            "threshold": 0.01,
            "rows": [
                {"s": 0.02, "start": "deme-a",
                 "fixation_probability": {"from": 0.1, "to": 0.12, "change": 0.02,
                                          "ci95": [0.01, 0.03], "flagged": true},
                 "mean_fixation_time": {"from": 50.0, "to": 48.0, "change": -2.0,
                                        "ci95": [-3.0, -1.0], "flagged": false}},
                {"s": 0.05, "start": "uniform",
                 "fixation_probability": {"from": 0.2, "to": 0.203, "change": 0.003,
                                          "ci95": [-0.001, 0.007], "flagged": false}}
            ],
            "matrix_changes": [
                {"source": "deme-a", "target": "deme-b", "from": 0.1, "to": 0.2, "change": 0.1},
                {"source": "deme-b", "target": "deme-a", "from": 0.3, "to": 0.1, "change": -0.2}
            ]
        });
        let html = changes_section(&doc);
        assert!(html.starts_with("<section id=\"changes\">"));
        assert!(html.contains("harbour-mobility"));
        assert!(html.contains("0193-a") && html.contains("2026-12-01"));
        assert_eq!(html.matches("<svg").count(), 1, "one chart");
        assert!(html.contains("<figcaption>"));
        assert!(html.contains("not forecasts"));
        assert_eq!(html.matches("<tr class=\"flagged\">").count(), 1, "{html}");
        assert!(html.contains("mean fixation time"));
        assert!(html.contains("[-3, -1]"));
        // matrix entries, largest change first
        let b_a = html.find("<td>deme-b</td><td>deme-a</td>").unwrap();
        let a_b = html.find("<td>deme-a</td><td>deme-b</td>").unwrap();
        assert!(b_a < a_b);
        assert!(html.ends_with("</section>\n"));
    }

    #[test]
    fn missing_members_leave_their_parts_out_without_failing() {
        let empty = changes_section(&json!({}));
        assert!(empty.contains("lists no changed result"));
        assert!(!empty.contains("<svg"));
        assert!(!empty.contains("<dl"));
        let odd = changes_section(&json!({
            "series": 7,
            "from": {"as_of": "2026-11-30"},
            "rows": [
                "not an object",
                {"start": "x", "fixation_probability": {"from": 0.1, "to": 0.15}},
                {"s": 0.1, "fixation_probability": {"flagged": true}},
                {"s": 0.1, "note": "text"}
            ],
            "matrix_changes": [{"source": "x"}]
        }));
        assert!(odd.contains("as of 2026-11-30"));
        // the change is derived from `from` and `to` when absent
        assert!(odd.contains("<td class=\"num\">0.05</td>"), "{odd}");
        assert_eq!(odd.matches("<svg").count(), 1);
        assert!(odd.contains("<td>x</td><td>—</td>"));
        assert!(changes_section(&json!([1, 2])).contains("lists no changed result"));
    }
}
