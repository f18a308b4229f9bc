//! Tolerant readers of the run document (`api.md`, "A run"): the members the report draws,
//! taken from a `serde_json::Value`, with anything missing or of the wrong type left out
//! rather than failing. The field names are those of [`crate::document`] and
//! [`crate::whatif`].

use serde_json::{Map, Value};

/// A number member.
pub fn f64_at(v: &Value, key: &str) -> Option<f64> {
    v.get(key)?.as_f64().filter(|x| x.is_finite())
}

/// A text member.
pub fn str_at<'a>(v: &'a Value, key: &str) -> Option<&'a str> {
    v.get(key)?.as_str()
}

/// A `[low, high]` member.
pub fn pair_at(v: &Value, key: &str) -> Option<(f64, f64)> {
    let a = v.get(key)?.as_array()?;
    match a.as_slice() {
        [lo, hi] => Some((lo.as_f64()?, hi.as_f64()?)),
        _ => None,
    }
}

/// An array member, empty when absent.
pub fn array_at<'a>(v: &'a Value, key: &str) -> &'a [Value] {
    v.get(key)
        .and_then(Value::as_array)
        .map(Vec::as_slice)
        .unwrap_or(&[])
}

/// What the job says about the model, from `spec`.
#[derive(Debug, Clone, Default)]
pub struct ModelFacts {
    /// `label`.
    pub label: Option<String>,
    /// `series`.
    pub series: Option<String>,
    /// Deme ids and sizes, in deme order.
    pub demes: Vec<(String, Option<u64>)>,
    /// `migration.orientation`.
    pub orientation: Option<String>,
    /// `migration.self_flows` as text (`keep` or a number).
    pub self_flows: Option<String>,
    /// `dynamics.rule`.
    pub rule: Option<String>,
    /// `dynamics.generation_days`.
    pub generation_days: Option<f64>,
    /// `selection.scope`.
    pub scope: Option<String>,
}

impl ModelFacts {
    /// The facts of `spec` (the run document's `spec` member).
    pub fn of(spec: &Value) -> Self {
        let demes = spec
            .pointer("/population/demes")
            .and_then(Value::as_array)
            .map(|demes| {
                demes
                    .iter()
                    .filter_map(|d| Some((str_at(d, "id")?.to_owned(), d.get("size")?.as_u64())))
                    .collect()
            })
            .unwrap_or_default();
        let text = |pointer: &str| {
            spec.pointer(pointer)
                .and_then(Value::as_str)
                .map(str::to_owned)
        };
        Self {
            label: text("/label"),
            series: text("/series"),
            demes,
            orientation: text("/migration/orientation"),
            self_flows: spec.pointer("/migration/self_flows").map(|v| match v {
                Value::String(s) => s.clone(),
                other => other.to_string(),
            }),
            rule: text("/dynamics/rule"),
            generation_days: spec
                .pointer("/dynamics/generation_days")
                .and_then(Value::as_f64),
            scope: text("/selection/scope"),
        }
    }

    /// Deme ids in deme order.
    pub fn deme_ids(&self) -> Vec<&str> {
        self.demes.iter().map(|(id, _)| id.as_str()).collect()
    }
}

/// A first-arrival time's summary at one fraction.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ArrivalSummary {
    /// Median.
    pub median: Option<f64>,
    /// Mean, when the document has one.
    pub mean: Option<f64>,
    /// 5% quantile.
    pub q05: Option<f64>,
    /// 95% quantile.
    pub q95: Option<f64>,
}

/// Deme id, then fraction (as the document's key), then the summary.
pub type Arrivals = Vec<(String, Vec<(String, ArrivalSummary)>)>;

/// One entry of `results`.
#[derive(Debug, Clone)]
pub struct ResultRow {
    /// Selection coefficient.
    pub s: f64,
    /// Deme id, `uniform` or `at_birth`.
    pub start: String,
    /// `exact`, `ensemble...` or `approximation:<name>`.
    pub method: String,
    /// Fixation probability.
    pub fixation_probability: f64,
    /// 95% interval (ensembles).
    pub ci95: Option<(f64, f64)>,
    /// Replicates (ensembles).
    pub replicates: Option<u64>,
    /// Well-mixed reference.
    pub well_mixed: Option<f64>,
    /// Its formula.
    pub well_mixed_method: Option<String>,
    /// Ratio to it.
    pub ratio: Option<f64>,
    /// Mean conditional fixation time, generations.
    pub mean_fixation_generations: Option<f64>,
    /// The same in days.
    pub mean_fixation_days: Option<f64>,
    /// Arrival times in generations.
    pub arrival_generations: Arrivals,
    /// Arrival times in days.
    pub arrival_days: Arrivals,
    /// The screening approximations beside the result (`approximations[].name`) with
    /// whether each is inside its valid regime, in the document's order.
    pub approximations: Vec<(String, bool)>,
}

fn arrivals(v: Option<&Value>) -> Arrivals {
    let Some(by_deme) = v.and_then(Value::as_object) else {
        return Vec::new();
    };
    by_deme
        .iter()
        .filter_map(|(deme, by_fraction)| {
            let by_fraction: &Map<String, Value> = by_fraction.as_object()?;
            let rows: Vec<(String, ArrivalSummary)> = by_fraction
                .iter()
                .map(|(f, q)| {
                    (
                        f.clone(),
                        ArrivalSummary {
                            median: f64_at(q, "median"),
                            mean: f64_at(q, "mean"),
                            q05: f64_at(q, "q05"),
                            q95: f64_at(q, "q95"),
                        },
                    )
                })
                .collect();
            Some((deme.clone(), rows))
        })
        .collect()
}

impl ResultRow {
    /// The row of `v`, when it has at least `s`, `start` and `fixation_probability`.
    pub fn of(v: &Value) -> Option<Self> {
        Some(Self {
            s: f64_at(v, "s")?,
            start: str_at(v, "start")?.to_owned(),
            method: str_at(v, "method").unwrap_or("unknown").to_owned(),
            fixation_probability: f64_at(v, "fixation_probability")?,
            ci95: pair_at(v, "ci95"),
            replicates: v.get("replicates").and_then(Value::as_u64),
            well_mixed: f64_at(v, "well_mixed_fixation_probability"),
            well_mixed_method: str_at(v, "well_mixed_method").map(str::to_owned),
            ratio: f64_at(v, "ratio_to_well_mixed"),
            mean_fixation_generations: f64_at(v, "mean_fixation_generations"),
            mean_fixation_days: f64_at(v, "mean_fixation_days"),
            arrival_generations: arrivals(v.get("arrival_generations")),
            arrival_days: arrivals(v.get("arrival_days")),
            approximations: array_at(v, "approximations")
                .iter()
                .filter_map(|a| {
                    let inside = a.pointer("/valid_regime/inside")?.as_bool()?;
                    Some((str_at(a, "name")?.to_owned(), inside))
                })
                .collect(),
        })
    }

    /// Every readable row of `results`.
    pub fn all(results: &[Value]) -> Vec<Self> {
        results.iter().filter_map(Self::of).collect()
    }
}

/// One entry of `sensitivity`.
#[derive(Debug, Clone)]
pub struct LinkRow {
    /// Selection coefficient of the result.
    pub s: f64,
    /// Start of the result.
    pub start: String,
    /// Deme the lineage moves from.
    pub from: String,
    /// Deme it moves to.
    pub to: String,
    /// Effect on the fixation probability.
    pub d_fixation_probability: f64,
    /// Paired interval (ensemble rows).
    pub ci95: Option<(f64, f64)>,
    /// How it was computed.
    pub method: String,
}

impl LinkRow {
    /// Every readable row of `sensitivity`.
    pub fn all(rows: &[Value]) -> Vec<Self> {
        rows.iter()
            .filter_map(|v| {
                Some(Self {
                    s: f64_at(v, "s")?,
                    start: str_at(v, "start")?.to_owned(),
                    from: str_at(v, "from")?.to_owned(),
                    to: str_at(v, "to")?.to_owned(),
                    d_fixation_probability: f64_at(v, "d_fixation_probability")?,
                    ci95: pair_at(v, "ci95"),
                    method: str_at(v, "method").unwrap_or("unknown").to_owned(),
                })
            })
            .collect()
    }
}

/// The distinct values of `s` in first-seen order.
pub fn distinct_s<'a>(values: impl IntoIterator<Item = &'a f64>) -> Vec<f64> {
    let mut out: Vec<f64> = Vec::new();
    for &s in values {
        if !out.contains(&s) {
            out.push(s);
        }
    }
    out
}

/// `k` indices spread evenly over `0..n` (first and last included), or all when `n <= k`.
pub fn evenly(n: usize, k: usize) -> Vec<usize> {
    if n <= k {
        return (0..n).collect();
    }
    if k <= 1 {
        return vec![0];
    }
    let mut out: Vec<usize> = (0..k)
        .map(|i| ((i as f64) * (n - 1) as f64 / (k - 1) as f64).round() as usize)
        .collect();
    out.dedup();
    out
}

/// The start a report shows when it shows only one: `uniform`, else `at_birth`, else the
/// first in `starts`.
pub fn primary_start<'a>(starts: &[&'a str]) -> Option<&'a str> {
    ["uniform", "at_birth"]
        .into_iter()
        .find_map(|p| starts.iter().copied().find(|s| *s == p))
        .or_else(|| starts.first().copied())
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn a_result_missing_its_required_members_is_left_out() {
        let rows = ResultRow::all(&[
            json!({"s": 0.1, "start": "a", "fixation_probability": 0.2, "ci95": [0.1, 0.3],
                   "arrival_generations": {"b": {"0.5": {"median": 3.0, "q05": 1.0}}}}),
            json!({"s": 0.1, "fixation_probability": 0.2}),
            json!("not an object"),
        ]);
        assert_eq!(rows.len(), 1);
        assert_eq!(rows[0].ci95, Some((0.1, 0.3)));
        assert_eq!(rows[0].method, "unknown");
        let (deme, fractions) = &rows[0].arrival_generations[0];
        assert_eq!(deme, "b");
        assert_eq!(fractions[0].1.median, Some(3.0));
        assert_eq!(fractions[0].1.q95, None);
    }

    #[test]
    fn evenly_spread_indices_include_both_ends() {
        assert_eq!(evenly(3, 6), vec![0, 1, 2]);
        assert_eq!(evenly(10, 3), vec![0, 5, 9]);
        assert_eq!(evenly(10, 1), vec![0]);
        assert_eq!(
            primary_start(&["a", "at_birth", "uniform"]),
            Some("uniform")
        );
        assert_eq!(primary_start(&["a", "b"]), Some("a"));
    }
}
