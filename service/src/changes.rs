//! What changed between two runs of a series, start by start: the change report. Pure.
//!
//! Rows are matched by `s` and start. For the fixation probability, two exact answers give
//! the plain difference; when either side is an ensemble, the 95% interval of the difference
//! of two independent proportions is Newcombe's hybrid score interval built from each side's
//! Wilson interval (Newcombe 1998, Statistics in Medicine 17:873, method 10); an exact side
//! counts as an interval of width zero. Mean fixation times and arrival medians of ensembles
//! carry no standard error in the result document, so one is estimated from the 5%–95%
//! quantile range as if the times were normal (sd ≈ (q95 − q05) / 3.29; standard error
//! sd / √fixed for a mean, 1.2533 sd / √fixed for a median), a rough normal approximation
//! that is stated beside every such interval. A change is flagged when its interval
//! excludes zero (for two exact answers: when they differ beyond solver precision) or when
//! its size reaches the threshold the caller set.

use serde_json::{json, Value};

/// z of a two-sided 95% interval.
const Z95: f64 = 1.959_963_984_540_054;
/// Width of the 5%–95% range of a normal distribution, in standard deviations.
const NORMAL_Q05_Q95_WIDTH: f64 = 2.0 * 1.644_853_626_951_472;
/// Asymptotic standard error of a sample median relative to that of the mean (√(π/2)).
const MEDIAN_SE_FACTOR: f64 = 1.253_314_137_315_500_3;
/// Two exact answers closer than this (relative) count as equal.
const EXACT_EQUAL_RELATIVE: f64 = 1e-9;
/// Matrix entries listed, largest change first.
pub const MATRIX_CHANGES_LISTED: usize = 10;

/// How the approximate intervals of times were made.
pub const TIME_INTERVAL_NOTE: &str = "normal approximation from the 5%-95% quantile range";

/// One side of the comparison.
#[derive(Debug, Clone)]
pub struct Side<'a> {
    /// Run id.
    pub run_id: &'a str,
    /// Its date in the series.
    pub as_of: Option<&'a str>,
    /// The stored spec.
    pub spec: &'a Value,
    /// The stored results (array).
    pub results: &'a Value,
}

/// Thresholds set by the caller: a change at least this large is flagged.
#[derive(Debug, Clone, Copy, Default)]
pub struct Thresholds {
    /// Absolute change of a fixation probability.
    pub fixation_probability: Option<f64>,
    /// Absolute change of a time, generations.
    pub generations: Option<f64>,
}

fn estimate(v: &Value) -> Option<(f64, f64, f64)> {
    let p = v["fixation_probability"].as_f64()?;
    match v["ci95"].as_array() {
        Some(ci) => Some((p, ci.first()?.as_f64()?, ci.get(1)?.as_f64()?)),
        None => Some((p, p, p)),
    }
}

fn flagged(
    change: f64,
    lo: f64,
    hi: f64,
    exact: bool,
    threshold: Option<f64>,
    scale: f64,
) -> Value {
    let distinguishable = if exact {
        change.abs() > EXACT_EQUAL_RELATIVE * scale.abs().max(f64::MIN_POSITIVE)
    } else {
        lo > 0.0 || hi < 0.0
    };
    let above = threshold.is_some_and(|t| change.abs() >= t);
    json!({
        "distinguishable": distinguishable,
        "above_threshold": above,
        "flagged": distinguishable || above,
    })
}

fn merge(mut a: Value, b: Value) -> Value {
    if let (Some(x), Value::Object(y)) = (a.as_object_mut(), b) {
        x.extend(y);
    }
    a
}

/// The change of the fixation probability between two result rows.
fn probability_change(a: &Value, b: &Value, threshold: Option<f64>) -> Option<Value> {
    let (pa, la, ua) = estimate(a)?;
    let (pb, lb, ub) = estimate(b)?;
    let d = pb - pa;
    let exact = la == ua && lb == ub;
    let lo = d - ((pb - lb).powi(2) + (ua - pa).powi(2)).sqrt();
    let hi = d + ((ub - pb).powi(2) + (pa - la).powi(2)).sqrt();
    Some(merge(
        json!({
            "from": pa, "to": pb, "change": d, "ci95": [lo, hi],
            "interval": if exact { "exact difference" } else { "Newcombe hybrid score (independent runs)" },
        }),
        flagged(d, lo, hi, exact, threshold, pa.max(pb)),
    ))
}

/// Standard error of a time summary from its quantiles among `fixed` replicates.
fn time_se(q05: Option<f64>, q95: Option<f64>, fixed: Option<f64>, factor: f64) -> Option<f64> {
    let (q05, q95, n) = (q05?, q95?, fixed?);
    (n >= 2.0).then(|| factor * (q95 - q05).max(0.0) / NORMAL_Q05_Q95_WIDTH / n.sqrt())
}

fn time_change(a: f64, sa: Option<f64>, b: f64, sb: Option<f64>, threshold: Option<f64>) -> Value {
    let d = b - a;
    let exact = sa.is_none() && sb.is_none();
    let half = Z95 * (sa.unwrap_or(0.0).powi(2) + sb.unwrap_or(0.0).powi(2)).sqrt();
    merge(
        json!({
            "from": a, "to": b, "change": d, "ci95": [d - half, d + half],
            "interval": if exact { "exact difference" } else { TIME_INTERVAL_NOTE },
        }),
        flagged(d, d - half, d + half, exact, threshold, a.max(b)),
    )
}

fn mean_fixation_change(a: &Value, b: &Value, threshold: Option<f64>) -> Option<Value> {
    let side = |v: &Value| -> Option<(f64, Option<f64>)> {
        let mean = v["mean_fixation_generations"].as_f64()?;
        let q = &v["fixation_generations_quantiles"];
        let se = time_se(
            q["0.05"].as_f64(),
            q["0.95"].as_f64(),
            v["fixed"].as_f64(),
            1.0,
        );
        Some((mean, se))
    };
    let (ma, sa) = side(a)?;
    let (mb, sb) = side(b)?;
    Some(time_change(ma, sa, mb, sb, threshold))
}

fn arrival_changes(a: &Value, b: &Value, threshold: Option<f64>) -> Vec<Value> {
    let (Some(ta), Some(tb)) = (
        a["arrival_generations"].as_object(),
        b["arrival_generations"].as_object(),
    ) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    for (deme, fractions) in ta {
        let Some(fractions) = fractions.as_object() else {
            continue;
        };
        for (fraction, qa) in fractions {
            let qb = &tb.get(deme).map_or(&Value::Null, |f| &f[fraction]);
            let (Some(ma), Some(mb)) = (qa["median"].as_f64(), qb["median"].as_f64()) else {
                continue;
            };
            let se = |q: &Value, row: &Value| {
                time_se(
                    q["q05"].as_f64(),
                    q["q95"].as_f64(),
                    row["fixed"].as_f64(),
                    MEDIAN_SE_FACTOR,
                )
            };
            out.push(merge(
                json!({"deme": deme, "fraction": fraction.parse::<f64>().ok(), "measure": "median_generations"}),
                time_change(ma, se(qa, a), mb, se(qb, b), threshold),
            ));
        }
    }
    out
}

fn row_key(v: &Value) -> Option<(String, String)> {
    Some((
        v["s"].as_f64()?.to_string(),
        v["start"].as_str()?.to_owned(),
    ))
}

/// The matrix entries that changed most (by absolute change), when both runs have the same
/// demes; otherwise a note saying why they are not compared.
fn matrix_changes(a: &Value, b: &Value) -> Value {
    let ids = |spec: &Value| -> Vec<String> {
        spec["population"]["demes"]
            .as_array()
            .map(|d| {
                d.iter()
                    .filter_map(|x| x["id"].as_str().map(str::to_owned))
                    .collect()
            })
            .unwrap_or_default()
    };
    let (ia, ib) = (ids(a), ids(b));
    if ia != ib || ia.is_empty() {
        return json!({"compared": false, "note": "the two runs have different demes", "entries": []});
    }
    let (ma, mb) = (&a["migration"]["matrix"], &b["migration"]["matrix"]);
    if a["migration"]["orientation"] != b["migration"]["orientation"] {
        return json!({"compared": false, "note": "the two matrices have different orientations", "entries": []});
    }
    let mut entries = Vec::new();
    for (i, source) in ia.iter().enumerate() {
        for (j, target) in ia.iter().enumerate() {
            let (Some(x), Some(y)) = (ma[i][j].as_f64(), mb[i][j].as_f64()) else {
                continue;
            };
            if x != y {
                entries.push((source, target, x, y));
            }
        }
    }
    let changed = entries.len();
    entries.sort_by(|p, q| (q.3 - q.2).abs().total_cmp(&(p.3 - p.2).abs()));
    entries.truncate(MATRIX_CHANGES_LISTED);
    json!({
        "compared": true,
        "orientation": a["migration"]["orientation"],
        "entries_changed": changed,
        "entries": entries.iter().map(|(s, t, x, y)| json!({
            "source": s, "target": t, "from": x, "to": y, "change": y - x,
        })).collect::<Vec<_>>(),
    })
}

/// A run of a series as [`choose`] sees it, in series order (by date, then submission).
#[derive(Debug, Clone, Copy)]
pub struct Night<'a> {
    /// Run id.
    pub run_id: &'a str,
    /// Its date.
    pub as_of: Option<&'a str>,
    /// Whether it succeeded (only succeeded runs are compared).
    pub succeeded: bool,
}

/// Which two runs to compare: `from` and `to` each name a run id or a date (`YYYY-MM-DD`, the
/// latest succeeded run of that date); by default `to` is the latest succeeded run and
/// `from` the succeeded run before it. Answers the positions in `nights`, or why not.
pub fn choose(
    nights: &[Night<'_>],
    from: Option<&str>,
    to: Option<&str>,
) -> Result<(usize, usize), String> {
    let find = |wanted: &str| -> Result<usize, String> {
        if let Some(i) = nights.iter().position(|n| n.run_id == wanted) {
            return if nights[i].succeeded {
                Ok(i)
            } else {
                Err(format!("run {wanted} has not succeeded"))
            };
        }
        nights
            .iter()
            .rposition(|n| n.succeeded && n.as_of == Some(wanted))
            .ok_or_else(|| {
                format!("no succeeded run of this series has the id or as_of {wanted:?}")
            })
    };
    let to = match to {
        Some(t) => find(t)?,
        None => nights
            .iter()
            .rposition(|n| n.succeeded)
            .ok_or("the series has no succeeded run")?,
    };
    let from = match from {
        Some(f) => find(f)?,
        None => nights[..to]
            .iter()
            .rposition(|n| n.succeeded && (n.as_of.is_none() || n.as_of != nights[to].as_of))
            .ok_or("the series has no succeeded run before the one compared to")?,
    };
    if from == to {
        return Err("`from` and `to` name the same run".to_owned());
    }
    Ok((from, to))
}

/// The change report from `from` to `to`.
pub fn report(series: &str, from: &Side<'_>, to: &Side<'_>, thresholds: Thresholds) -> Value {
    let empty = Vec::new();
    let rows_to = to.results.as_array().unwrap_or(&empty);
    let mut rows = Vec::new();
    let mut unmatched = Vec::new();
    for a in from.results.as_array().unwrap_or(&empty) {
        let Some(key) = row_key(a) else { continue };
        let Some(b) = rows_to.iter().find(|b| row_key(b).as_ref() == Some(&key)) else {
            unmatched.push(json!({"s": a["s"], "start": a["start"]}));
            continue;
        };
        rows.push(json!({
            "s": a["s"],
            "start": a["start"],
            "method": {"from": a["method"], "to": b["method"]},
            "fixation_probability": probability_change(a, b, thresholds.fixation_probability),
            "mean_fixation_generations": mean_fixation_change(a, b, thresholds.generations),
            "arrival": arrival_changes(a, b, thresholds.generations),
        }));
    }
    let flagged = rows
        .iter()
        .filter(|r| r["fixation_probability"]["flagged"] == true)
        .count();
    json!({
        "series": series,
        "from": {"run_id": from.run_id, "as_of": from.as_of},
        "to": {"run_id": to.run_id, "as_of": to.as_of},
        "threshold": thresholds.fixation_probability,
        "generations_threshold": thresholds.generations,
        "rows": rows,
        "flagged_fixation_probabilities": flagged,
        "unmatched": unmatched,
        "matrix_changes": matrix_changes(from.spec, to.spec),
        "caution": crate::document::DISCLAIMER,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(m01: f64) -> Value {
        json!({"population": {"demes": [{"id": "a"}, {"id": "b"}]},
               "migration": {"orientation": "flows", "matrix": [[0.0, m01], [1.0, 0.0]]}})
    }

    #[test]
    fn two_exact_answers_give_the_plain_difference() {
        let a = json!([{"s": 0.1, "start": "a", "fixation_probability": 0.2, "mean_fixation_generations": 50.0}]);
        let b = json!([{"s": 0.1, "start": "a", "fixation_probability": 0.25, "mean_fixation_generations": 50.0}]);
        let (sa, sb) = (spec(1.0), spec(3.0));
        let r = report(
            "x",
            &Side {
                run_id: "1",
                as_of: Some("2026-11-30"),
                spec: &sa,
                results: &a,
            },
            &Side {
                run_id: "2",
                as_of: Some("2026-12-01"),
                spec: &sb,
                results: &b,
            },
            Thresholds {
                fixation_probability: Some(0.1),
                generations: None,
            },
        );
        let fp = &r["rows"][0]["fixation_probability"];
        assert!((fp["change"].as_f64().unwrap() - 0.05).abs() < 1e-15);
        assert_eq!(fp["ci95"][0], fp["ci95"][1]);
        assert_eq!(fp["distinguishable"], true);
        assert_eq!(fp["above_threshold"], false);
        let t = &r["rows"][0]["mean_fixation_generations"];
        assert_eq!(t["flagged"], false);
        assert_eq!(r["matrix_changes"]["entries"][0]["source"], "a");
        assert_eq!(r["matrix_changes"]["entries"][0]["change"], 2.0);
    }

    /// Newcombe (1998), Statistics in Medicine 17:873, table II, example (a): 56/70 against
    /// 48/80 gives the difference 0.2000 with the method-10 interval (0.0524, 0.3339)
    /// (values recalled from memory of the paper's table).
    #[test]
    fn ensemble_differences_use_newcombes_hybrid_score_interval() {
        let wilson = |x: f64, n: f64| demefix_science::stats::wilson(x as u64, n as u64, Z95);
        let (l1, u1) = wilson(56.0, 70.0);
        let (l2, u2) = wilson(48.0, 80.0);
        let a = json!({"fixation_probability": 48.0 / 80.0, "ci95": [l2, u2]});
        let b = json!({"fixation_probability": 56.0 / 70.0, "ci95": [l1, u1]});
        let c = probability_change(&a, &b, None).unwrap();
        let ci = c["ci95"].as_array().unwrap();
        assert!((c["change"].as_f64().unwrap() - 0.2).abs() < 1e-12);
        assert!((ci[0].as_f64().unwrap() - 0.0524).abs() < 5e-5, "{c}");
        assert!((ci[1].as_f64().unwrap() - 0.3339).abs() < 5e-5, "{c}");
        assert_eq!(c["distinguishable"], true);
    }
}
