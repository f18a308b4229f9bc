//! The result document (`api.md`, "A run") and the field names of each result.
//!
//! This module owns how the science crate's answers are written down: one [`RunResult`] per
//! `(s, start)`, with the method that produced it, the well-mixed reference beside it, and
//! the `_days` twin of every time when the job gives `dynamics.generation_days`. Field order
//! is fixed by the struct declarations, maps are sorted, and floats are written in shortest
//! round-trip form, so the same answers always give the same bytes.

use crate::provenance::Provenance;
use crate::spec::JobSpec;
use demefix_science::ensemble::{EnsembleSummary, StopReason, TimeQuantiles};
use demefix_science::exact::SolverReport;
use demefix_science::start::DemeAnswer;
use demefix_science::well_mixed::WellMixedReference;
use serde::Serialize;
use std::collections::BTreeMap;

/// Printed with every result document.
pub const DISCLAIMER: &str = "Model estimates for planning, not forecasts. The numbers follow \
from the stated model (constant deme sizes, the given migration matrix and update rule, one \
new variant of constant fitness 1 + s) and hold only as far as those assumptions do. They do \
not replace surveillance data or expert judgement; decisions rest with the responsible \
public-health authorities and local regulations.";

/// What the well-mixed reference assumes, for `valid_regime` of approximation results.
pub const WELL_MIXED_REGIME: &str = "a single well-mixed population of the same total size: \
ignores structure, so it matches the structured model only when migration mixes the demes \
much faster than drift and selection act (and exactly for birth_death under conservative \
migration)";

/// The 5%, 50% and 95% quantiles of a time, keyed `"0.05"`, `"0.5"`, `"0.95"`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Quantiles {
    /// 5% quantile.
    #[serde(rename = "0.05")]
    pub q05: f64,
    /// Median.
    #[serde(rename = "0.5")]
    pub median: f64,
    /// 95% quantile.
    #[serde(rename = "0.95")]
    pub q95: f64,
}

/// Quantiles of a first-arrival time: `median`, `q05`, `q95`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ArrivalQuantiles {
    /// Median.
    pub median: f64,
    /// 5% quantile.
    pub q05: f64,
    /// 95% quantile.
    pub q95: f64,
}

/// `arrival_generations`: deme id, then arrival fraction as text, then quantiles.
pub type ArrivalTable = BTreeMap<String, BTreeMap<String, ArrivalQuantiles>>;

/// The answer for one selection coefficient and one start.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunResult {
    /// Selection coefficient.
    pub s: f64,
    /// Deme id, `uniform` or `at_birth`.
    pub start: String,
    /// `exact`, `ensemble` or `approximation:<name>`.
    pub method: String,
    /// Fixation probability of the single variant.
    pub fixation_probability: f64,
    /// 95% interval (ensembles only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ci95: Option<[f64; 2]>,
    /// Replicates run (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub replicates: Option<u64>,
    /// Replicates that fixed (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fixed: Option<u64>,
    /// Replicates lost (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub lost: Option<u64>,
    /// Replicates still running at `max_generations` (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unresolved: Option<u64>,
    /// Mean time to absorption (fixation or loss), generations.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mean_absorption_generations: Option<f64>,
    /// The same in days.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mean_absorption_days: Option<f64>,
    /// Mean time to fixation among fixing paths, generations.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mean_fixation_generations: Option<f64>,
    /// The same in days.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub mean_fixation_days: Option<f64>,
    /// Quantiles of the fixation time, generations (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fixation_generations_quantiles: Option<Quantiles>,
    /// The same in days.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fixation_days_quantiles: Option<Quantiles>,
    /// Quantiles of the absorption time, generations (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub absorption_generations_quantiles: Option<Quantiles>,
    /// The same in days.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub absorption_days_quantiles: Option<Quantiles>,
    /// First generation each deme reaches each arrival fraction, among fixing replicates.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub arrival_generations: Option<ArrivalTable>,
    /// The same in days.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub arrival_days: Option<ArrivalTable>,
    /// Why the ensemble stopped.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stop_reason: Option<StopReason>,
    /// Linear solver of the exact method.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub solver: Option<String>,
    /// Largest relative residual of the exact solve.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub relative_residual: Option<f64>,
    /// Iterations of an iterative exact solve.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub solver_iterations: Option<usize>,
    /// Count vectors of the exact chain.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub states: Option<u64>,
    /// Where an approximation holds.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub valid_regime: Option<&'static str>,
    /// Fixation probability in a well-mixed population of the same total size.
    pub well_mixed_fixation_probability: f64,
    /// Formula of the well-mixed reference (`moran`, `wright_fisher_exact`, ...).
    pub well_mixed_method: &'static str,
    /// `fixation_probability / well_mixed_fixation_probability`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ratio_to_well_mixed: Option<f64>,
}

/// How to write times: whether at all, and the length of a generation in days.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TimeUnits {
    /// `outputs.times`: report absorption and fixation times.
    pub times: bool,
    /// `dynamics.generation_days`.
    pub generation_days: Option<f64>,
}

impl TimeUnits {
    fn days(&self, generations: Option<f64>) -> Option<f64> {
        Some(generations? * self.generation_days?)
    }

    fn time(&self, generations: f64) -> Option<f64> {
        (self.times && generations.is_finite()).then_some(generations)
    }

    fn quantiles(&self, q: Option<&TimeQuantiles>, scale: f64) -> Option<Quantiles> {
        let q = q.filter(|_| self.times)?;
        Some(Quantiles {
            q05: q.q05 * scale,
            median: q.median * scale,
            q95: q.q95 * scale,
        })
    }
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

impl RunResult {
    fn bare(s: f64, start: &str, method: String, rho: f64, wm: &WellMixedReference) -> Self {
        let ratio = if wm.fixation_probability > 0.0 {
            finite(rho / wm.fixation_probability)
        } else {
            None
        };
        Self {
            s,
            start: start.to_owned(),
            method,
            fixation_probability: rho,
            ci95: None,
            replicates: None,
            fixed: None,
            lost: None,
            unresolved: None,
            mean_absorption_generations: None,
            mean_absorption_days: None,
            mean_fixation_generations: None,
            mean_fixation_days: None,
            fixation_generations_quantiles: None,
            fixation_days_quantiles: None,
            absorption_generations_quantiles: None,
            absorption_days_quantiles: None,
            arrival_generations: None,
            arrival_days: None,
            stop_reason: None,
            solver: None,
            relative_residual: None,
            solver_iterations: None,
            states: None,
            valid_regime: None,
            well_mixed_fixation_probability: wm.fixation_probability,
            well_mixed_method: wm.method,
            ratio_to_well_mixed: ratio,
        }
    }

    /// An exact answer (already combined over the start's deme weights).
    pub fn exact(
        s: f64,
        start: &str,
        answer: &DemeAnswer,
        report: &SolverReport,
        wm: &WellMixedReference,
        units: TimeUnits,
    ) -> Self {
        let mut r = Self::bare(
            s,
            start,
            "exact".to_owned(),
            answer.fixation_probability,
            wm,
        );
        r.mean_absorption_generations = units.time(answer.mean_absorption_generations);
        r.mean_absorption_days = units.days(r.mean_absorption_generations);
        r.mean_fixation_generations = units.time(answer.mean_fixation_generations);
        r.mean_fixation_days = units.days(r.mean_fixation_generations);
        r.solver = Some(report.solver.clone());
        r.relative_residual = Some(report.relative_residual);
        r.solver_iterations = report.iterations;
        r.states = Some(report.states);
        r
    }

    /// An ensemble summary; `deme_ids` and `fractions` name the arrival table's keys.
    pub fn ensemble(
        s: f64,
        start: &str,
        summary: &EnsembleSummary,
        deme_ids: &[&str],
        fractions: &[f64],
        wm: &WellMixedReference,
        units: TimeUnits,
    ) -> Self {
        let mut r = Self::bare(
            s,
            start,
            "ensemble".to_owned(),
            summary.fixation_probability,
            wm,
        );
        r.ci95 = Some([summary.ci95.0, summary.ci95.1]);
        r.replicates = Some(summary.replicates);
        r.fixed = Some(summary.fixed);
        r.lost = Some(summary.lost);
        r.unresolved = Some(summary.unresolved);
        let mean = |x: Option<f64>| units.time(x?);
        r.mean_absorption_generations = mean(summary.mean_absorption_generations);
        r.mean_absorption_days = units.days(r.mean_absorption_generations);
        r.mean_fixation_generations = mean(summary.mean_fixation_generations);
        r.mean_fixation_days = units.days(r.mean_fixation_generations);
        let fix = summary.fixation_quantiles.as_ref();
        let abs = summary.absorption_quantiles.as_ref();
        r.fixation_generations_quantiles = units.quantiles(fix, 1.0);
        r.absorption_generations_quantiles = units.quantiles(abs, 1.0);
        if let Some(d) = units.generation_days {
            r.fixation_days_quantiles = units.quantiles(fix, d);
            r.absorption_days_quantiles = units.quantiles(abs, d);
        }
        if !fractions.is_empty() {
            let table = |scale: f64| -> ArrivalTable {
                summary
                    .arrival
                    .iter()
                    .enumerate()
                    .filter_map(|(deme, by_fraction)| {
                        let id = deme_ids.get(deme)?;
                        let inner: BTreeMap<String, ArrivalQuantiles> = by_fraction
                            .iter()
                            .filter_map(|(f, q)| {
                                Some((
                                    fraction_key(*fractions.get(*f)?),
                                    ArrivalQuantiles {
                                        median: q.median * scale,
                                        q05: q.q05 * scale,
                                        q95: q.q95 * scale,
                                    },
                                ))
                            })
                            .collect();
                        Some(((*id).to_owned(), inner))
                    })
                    .collect()
            };
            r.arrival_generations = Some(table(1.0));
            r.arrival_days = units.generation_days.map(table);
        }
        r.stop_reason = Some(summary.stop);
        r
    }

    /// The well-mixed reference as the answer of method `approximation`.
    pub fn approximation(s: f64, start: &str, wm: &WellMixedReference) -> Self {
        let method = format!("approximation:well_mixed_{}", wm.method);
        let mut r = Self::bare(s, start, method, wm.fixation_probability, wm);
        r.valid_regime = Some(WELL_MIXED_REGIME);
        r
    }
}

/// What a link sensitivity means, written beside each entry.
pub const SENSITIVITY_MEANING: &str = "change per unit of probability moved from this link to \
local retention in the rule's matrix (B for death_birth, F for birth_death), rows kept \
stochastic; negative: reducing the link lowers the quantity";

/// The effect of reducing one movement link on one result (`sensitivity` of api.md).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LinkSensitivity {
    /// Selection coefficient of the result.
    pub s: f64,
    /// Start of the result (deme id, `uniform` or `at_birth`).
    pub start: String,
    /// Deme the lineage moves from along the link.
    pub from: String,
    /// Deme the lineage moves to.
    pub to: String,
    /// Derivative of the fixation probability.
    pub d_fixation_probability: f64,
    /// Derivative of the mean conditional fixation time, generations (when times are
    /// reported and fixation is possible).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub d_mean_fixation_generations: Option<f64>,
    /// How it was computed: `exact_adjoint`.
    pub method: &'static str,
    /// [`SENSITIVITY_MEANING`].
    pub meaning: &'static str,
}

/// An arrival fraction as a map key: shortest round-trip decimal (`0.05`, `0.5`, `1`).
pub fn fraction_key(f: f64) -> String {
    format!("{f}")
}

/// What `demefix run` prints.
#[derive(Debug, Clone, Serialize)]
pub struct RunDocument<'a> {
    /// The job as accepted, defaults filled in.
    pub spec: &'a JobSpec,
    /// Hashes, seed, versions, host.
    pub provenance: &'a Provenance,
    /// One result per `(s, start)`, sweep order outermost.
    pub results: &'a [RunResult],
    /// Link sensitivities (when `outputs.sensitivity`), per `(s, start)` in result order,
    /// most lowering first.
    #[serde(skip_serializing_if = "<[LinkSensitivity]>::is_empty")]
    pub sensitivity: &'a [LinkSensitivity],
    /// Everything the caller should know about how the job was read and run.
    pub warnings: &'a [String],
    /// [`DISCLAIMER`].
    pub disclaimer: &'static str,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fraction_keys_are_short_decimals() {
        assert_eq!(fraction_key(0.05), "0.05");
        assert_eq!(fraction_key(0.5), "0.5");
        assert_eq!(fraction_key(1.0), "1");
    }

    #[test]
    fn quantile_keys_are_the_probabilities() {
        let q = Quantiles {
            q05: 1.0,
            median: 2.0,
            q95: 3.0,
        };
        let v = serde_json::to_value(q).unwrap();
        assert_eq!(v, serde_json::json!({"0.05": 1.0, "0.5": 2.0, "0.95": 3.0}));
    }

    #[test]
    fn days_twins_scale_every_time_and_ratios_skip_a_zero_reference() {
        let wm = WellMixedReference {
            fixation_probability: 0.2,
            method: "moran",
        };
        let answer = DemeAnswer {
            fixation_probability: 0.1,
            mean_absorption_generations: 3.0,
            mean_fixation_generations: f64::NAN,
        };
        let report = SolverReport {
            solver: "sparse_lu".to_owned(),
            relative_residual: 1e-15,
            states: 10,
            nonzeros: 30,
            iterations: None,
        };
        let units = TimeUnits {
            times: true,
            generation_days: Some(2.5),
        };
        let r = RunResult::exact(0.1, "a", &answer, &report, &wm, units);
        assert_eq!(r.mean_absorption_days, Some(7.5));
        assert_eq!(r.mean_fixation_generations, None);
        assert_eq!(r.ratio_to_well_mixed, Some(0.5));
        let zero = WellMixedReference {
            fixation_probability: 0.0,
            method: "moran",
        };
        assert_eq!(
            RunResult::exact(0.1, "a", &answer, &report, &zero, units).ratio_to_well_mixed,
            None
        );
    }
}
