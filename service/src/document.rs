//! The result document (`api.md`, "A run") and the field names of each result.
//!
//! This module owns how the science crate's answers are written down: one [`RunResult`] per
//! `(s, start)`, with the method that produced it, the well-mixed reference beside it, the
//! screening approximations beside it ([`ApproximationEntry`], with their discrepancy from an
//! exact or ensemble answer), and the `_days` twin of every time when the job gives
//! `dynamics.generation_days`. Field order
//! is fixed by the struct declarations, maps are sorted, and floats are written in shortest
//! round-trip form, so the same answers always give the same bytes.

use crate::provenance::Provenance;
use crate::spec::JobSpec;
use crate::whatif::{InterventionResult, PlanResult};
use demefix_science::approx::ValidRegime;
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

/// What the well-mixed reference assumes: the reason in the `valid_regime` of a well-mixed
/// result (given only when no screening approximation could be computed).
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
    /// Where an approximation holds (approximation results).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub valid_regime: Option<ValidRegime>,
    /// Fixation probability in a well-mixed population of the same total size.
    pub well_mixed_fixation_probability: f64,
    /// Formula of the well-mixed reference (`moran`, `wright_fisher_exact`, ...).
    pub well_mixed_method: &'static str,
    /// `fixation_probability / well_mixed_fixation_probability`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ratio_to_well_mixed: Option<f64>,
    /// Every screening approximation the job computed for this `(s, start)`, in the job's
    /// order (`None` when the job computes none).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub approximations: Option<Vec<ApproximationEntry>>,
}

/// `rho(s) ≈ neutral + s slope`: the first-order weak-selection coefficients of a start.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WeakCoefficients {
    /// Neutral fixation probability.
    pub neutral: f64,
    /// `d rho / d s` at `s = 0`.
    pub slope: f64,
}

/// One screening approximation beside a result (`approximations` of a result).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ApproximationEntry {
    /// `branching`, `strong_migration` or `weak_selection`.
    pub name: &'static str,
    /// The approximation's fixation probability for this `(s, start)` (a weak-selection value
    /// outside `[0, 1]` is written as the nearest bound; its regime says so).
    pub fixation_probability: f64,
    /// The weak-selection coefficients (`weak_selection` only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub coefficients: Option<WeakCoefficients>,
    /// Where the approximation holds, computed for this model and `s`.
    pub valid_regime: ValidRegime,
    /// `fixation_probability` minus the result's own (exact or ensemble results).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub discrepancy: Option<f64>,
    /// The discrepancy in binomial standard errors `sqrt(p (1 - p) / replicates)` of the
    /// ensemble estimate `p` (ensembles with `0 < p < 1`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub discrepancy_standard_errors: Option<f64>,
    /// Whether the approximation lies inside the ensemble's `ci95`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub inside_ci95: Option<bool>,
}

impl ApproximationEntry {
    /// An entry without a discrepancy.
    pub fn new(
        name: &'static str,
        fixation_probability: f64,
        coefficients: Option<WeakCoefficients>,
        valid_regime: ValidRegime,
    ) -> Self {
        Self {
            name,
            fixation_probability,
            coefficients,
            valid_regime,
            discrepancy: None,
            discrepancy_standard_errors: None,
            inside_ci95: None,
        }
    }

    /// Records the discrepancy from `primary` when it is an exact or ensemble result.
    pub fn compare_with(&mut self, primary: &RunResult) {
        if primary.method != "exact" && !primary.method.starts_with("ensemble") {
            return;
        }
        let p = primary.fixation_probability;
        let difference = self.fixation_probability - p;
        self.discrepancy = Some(difference);
        if let Some([low, high]) = primary.ci95 {
            self.inside_ci95 = Some((low..=high).contains(&self.fixation_probability));
        }
        // The binomial standard error of `fixed / replicates` (common practice).
        if let Some(n) = primary.replicates.filter(|&n| n > 0) {
            let se = (p * (1.0 - p) / n as f64).sqrt();
            self.discrepancy_standard_errors = (se > 0.0).then(|| difference / se);
        }
    }
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
            approximations: None,
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

    /// A screening approximation as the answer of method `approximation`; `method` is
    /// `approximation:<name>`.
    pub fn screening(
        s: f64,
        start: &str,
        method: &str,
        fixation_probability: f64,
        regime: ValidRegime,
        wm: &WellMixedReference,
    ) -> Self {
        let mut r = Self::bare(s, start, method.to_owned(), fixation_probability, wm);
        r.valid_regime = Some(regime);
        r
    }

    /// The well-mixed reference as the answer of method `approximation`, when no screening
    /// approximation could be computed; its regime is never marked inside.
    pub fn approximation(s: f64, start: &str, wm: &WellMixedReference) -> Self {
        let method = format!("approximation:well_mixed_{}", wm.method);
        let mut r = Self::bare(s, start, method, wm.fixation_probability, wm);
        r.valid_regime = Some(ValidRegime {
            approximation: "well_mixed",
            indicators: Vec::new(),
            inside: false,
            reasons: vec![WELL_MIXED_REGIME.to_owned()],
        });
        r
    }
}

/// What a link sensitivity means, written beside each entry.
pub const SENSITIVITY_MEANING: &str = "change per unit of probability moved from this link to \
local retention in the rule's matrix (B for death_birth and wright_fisher, F for \
birth_death), rows kept stochastic; negative: reducing the link lowers the quantity";

/// What the `_per_flow` derivatives of a `flows` job mean, written beside each entry.
pub const FLOW_SENSITIVITY_MEANING: &str = "change per unit reduction of the raw flow \
migration.matrix[from][to] as sent, the matrix normalised again as self_flows says (keep: \
row or column sums; a number: stated retention, the other links sharing the rest); \
negative: reducing the flow lowers the quantity";

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
    /// How it was computed: `exact_adjoint`, or `approximation:<name>` for the gradient of a
    /// screening approximation.
    pub method: &'static str,
    /// [`SENSITIVITY_MEANING`].
    pub meaning: &'static str,
    /// `flows` jobs: the raw flow `migration.matrix[from][to]` behind the link.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flow: Option<f64>,
    /// `flows` jobs: change of the fixation probability per unit reduction of that flow.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub d_fixation_probability_per_flow: Option<f64>,
    /// `flows` jobs: the same for the mean conditional fixation time, generations.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub d_mean_fixation_generations_per_flow: Option<f64>,
    /// `flows` jobs: [`FLOW_SENSITIVITY_MEANING`].
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flow_meaning: Option<&'static str>,
    /// Paired ensemble rows (`ensemble_paired_secant`, [`crate::whatif`]): 95% interval of
    /// `d_fixation_probability`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ci95: Option<[f64; 2]>,
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
    /// What-if scenarios against the baseline ([`crate::whatif`]), when the job has them.
    #[serde(skip_serializing_if = "<[InterventionResult]>::is_empty")]
    pub interventions: &'a [InterventionResult],
    /// The greedy plan of link reductions ([`crate::whatif`]), when the job asks for one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub plan: Option<&'a PlanResult>,
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
    fn discrepancies_are_measured_against_exact_and_ensemble_answers_only() {
        let wm = WellMixedReference {
            fixation_probability: 0.2,
            method: "moran",
        };
        let regime = ValidRegime {
            approximation: "branching",
            indicators: Vec::new(),
            inside: true,
            reasons: Vec::new(),
        };
        let entry = || ApproximationEntry::new("branching", 0.12, None, regime.clone());
        let mut ensemble = RunResult::bare(0.1, "a", "ensemble".to_owned(), 0.1, &wm);
        ensemble.ci95 = Some([0.09, 0.11]);
        ensemble.replicates = Some(10_000);
        let mut e = entry();
        e.compare_with(&ensemble);
        assert!((e.discrepancy.unwrap() - 0.02).abs() < 1e-15);
        // standard error sqrt(0.1 * 0.9 / 10^4) = 0.003
        assert!((e.discrepancy_standard_errors.unwrap() - 0.02 / 0.003).abs() < 1e-9);
        assert_eq!(e.inside_ci95, Some(false));
        ensemble.fixation_probability = 0.0;
        let mut e = entry();
        e.compare_with(&ensemble);
        assert_eq!(
            e.discrepancy_standard_errors, None,
            "no standard error at p = 0"
        );
        let approx = RunResult::approximation(0.1, "a", &wm);
        let mut e = entry();
        e.compare_with(&approx);
        assert_eq!(e, entry());
        assert!(!approx.valid_regime.unwrap().inside);
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
