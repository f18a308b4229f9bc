//! Computes a job's `interventions` and `plan`, and the paired ensemble link rows of
//! `outputs.sensitivity`, after its results, by the method its results used.
//!
//! This module owns how the science crate's what-if answers (`demefix_science::whatif`) are
//! run for a validated job and written into the run document:
//!
//! * `interventions`: one row per (scenario, `s`, start), in job order (scenarios outermost,
//!   then the sweep, then the starts): the fixation probability of the baseline and of the
//!   scenario and its change, the change of the mean fixation time and, for ensembles with
//!   `outputs.arrival_fractions`, of every deme's arrival times. Exact jobs difference two
//!   exact solves; ensemble jobs run the baseline and the scenario from the same random
//!   streams (the job's seed), so the baseline of a row is the job's own ensemble;
//! * `plan`: the greedy plan for `plan.s` over the job's starts, evaluated by the same method
//!   (its shortlist ranked by the exact adjoint when the chain fits, else an approximation);
//! * ensemble link rows: for each `(s, start)` of an ensemble job with
//!   `outputs.sensitivity`, the [`ENSEMBLE_SENSITIVITY_LINKS`] links ranked highest by an
//!   approximation gradient get a paired finite difference with an interval (method
//!   `ensemble_paired_secant`), beside the approximation's own rows.
//!
//! A scenario or plan that cannot be computed (a solver that fails on the changed chain, no
//! gradient to rank links) is left out with a warning; only cancellation stops the job. What-if
//! ensembles run after the job's own, report no progress of their own and are not
//! checkpointed: an interrupted job recomputes them, with identical results.

use crate::compute::{ComputeError, Outcome};
use crate::document::{fraction_key, LinkSensitivity};
use crate::spec::ValidatedJob;
use demefix_science::ensemble::EnsembleConfig;
use demefix_science::whatif::{
    self, paired_link_effects, EnsembleEvaluator, Estimate, Evaluator, ExactEvaluator,
    ExactGradient, Plan, PlanConfig, StartChange, WhatIfError,
};
use demefix_science::Model;
use serde::Serialize;
use std::collections::BTreeMap;
use std::sync::atomic::AtomicBool;

/// Links per `(s, start)` that get a paired ensemble row: each costs one more ensemble.
pub const ENSEMBLE_SENSITIVITY_LINKS: usize = 3;

/// `meaning` of a paired ensemble link row.
pub const PAIRED_SENSITIVITY_MEANING: &str = "change per unit of probability moved from this \
link to local retention in the rule's matrix (B for death_birth and wright_fisher, F for \
birth_death), estimated by moving half of the link and running paired ensembles from the same \
random streams (a secant, not a derivative); ci95 is the paired interval of the change divided \
by the probability moved";

/// `meaning` of an intervention row.
pub const INTERVENTION_MEANING: &str = "scenario minus baseline: each change moves probability \
between a link of the rule's matrix (B for death_birth and wright_fisher, F for birth_death) and \
its row's local retention; ensembles pair replicate q of the scenario with replicate q of the \
baseline (same random stream); model estimates for planning, not forecasts";

/// How the plan's flow is counted.
pub const FLOW_UNIT: &str = "expected lineage movements per generation between demes in the \
neutral chain (n_row x matrix entry, summed over links)";

/// What the plan does not promise.
pub const PLAN_LIMITS: &str = "greedy: each step cuts the one shortlisted link (fully, or partly \
when the budget runs out) that lowers the start-averaged fixation probability most, never undoing \
an earlier step, so the plan need not be the best set of cuts; the shortlist is ranked by a \
first-order gradient; with ensembles the choice is made on separate random streams and can be \
wrong when candidates differ by less than their noise, while the reported figures come from the \
job's own streams";

/// Newcombe's interval, named in each ensemble row.
pub const PAIRED_INTERVAL: &str = "newcombe_1998_paired_hybrid_score";

/// The what-if part of a job's outcome.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct WhatIfResults {
    /// One row per (scenario, `s`, start).
    pub interventions: Vec<InterventionResult>,
    /// The plan, when asked for and computed.
    pub plan: Option<PlanResult>,
}

/// Pairs of an ensemble row by how each member ended.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PairCounts {
    /// Both fixed.
    pub both_fixed: u64,
    /// Only the baseline fixed.
    pub baseline_only: u64,
    /// Only the scenario fixed.
    pub scenario_only: u64,
    /// Neither fixed (both absorbed without fixing).
    pub neither: u64,
    /// At least one member unresolved at `max_generations`.
    pub unresolved: u64,
}

/// The change of one deme's first-arrival time at one fraction, generations, among fixing
/// replicates.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ArrivalChangeRow {
    /// Baseline median.
    pub baseline_median: f64,
    /// Scenario median.
    pub scenario_median: f64,
    /// Change of the median.
    pub change_median: f64,
    /// Change of the mean.
    pub change_mean: f64,
    /// Normal 95% interval of the change of the mean.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub change_mean_ci95: Option<[f64; 2]>,
}

/// One row of `interventions`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InterventionResult {
    /// The scenario's name.
    pub name: String,
    /// Selection coefficient.
    pub s: f64,
    /// Deme id, `uniform` or `at_birth`.
    pub start: String,
    /// `exact` or `ensemble`.
    pub method: &'static str,
    /// Fixation probability without the changes.
    pub baseline_fixation_probability: f64,
    /// Its 95% interval (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub baseline_ci95: Option<[f64; 2]>,
    /// Fixation probability with the changes.
    pub scenario_fixation_probability: f64,
    /// Its 95% interval (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub scenario_ci95: Option<[f64; 2]>,
    /// Scenario minus baseline.
    pub change_fixation_probability: f64,
    /// Paired 95% interval of the change (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub change_ci95: Option<[f64; 2]>,
    /// [`PAIRED_INTERVAL`] (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub interval_method: Option<&'static str>,
    /// Mean conditional fixation time of the baseline, generations.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub baseline_mean_fixation_generations: Option<f64>,
    /// The same for the scenario.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub scenario_mean_fixation_generations: Option<f64>,
    /// Its change.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub change_mean_fixation_generations: Option<f64>,
    /// Normal 95% interval of that change (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub change_mean_fixation_ci95: Option<[f64; 2]>,
    /// Pair counts (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pairs: Option<PairCounts>,
    /// Deme id, then arrival fraction, then the change of the arrival time (ensembles with
    /// `outputs.arrival_fractions`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub arrival_change_generations: Option<BTreeMap<String, BTreeMap<String, ArrivalChangeRow>>>,
    /// [`INTERVENTION_MEANING`].
    pub meaning: &'static str,
}

/// A shortlisted candidate of a plan step.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CandidateRow {
    /// Deme the lineages leave.
    pub from: String,
    /// Deme they settle in.
    pub to: String,
    /// Probability the cut would move to retention.
    pub amount: f64,
    /// First-order change predicted by the ranking gradient.
    pub predicted_change: f64,
    /// Objective after the cut on the selection streams (ensembles) or exactly.
    pub objective: f64,
    /// Its 95% interval (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub objective_ci95: Option<[f64; 2]>,
}

/// One step of `plan.steps`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanStepRow {
    /// 1-based.
    pub step: usize,
    /// Deme the lineages leave.
    pub from: String,
    /// Deme they settle in.
    pub to: String,
    /// Probability moved from the link to its row's retention.
    pub amount: f64,
    /// Whether the link is now closed.
    pub closed: bool,
    /// Flow removed by this step ([`FLOW_UNIT`]).
    pub flow_cut: f64,
    /// Running total: share of the starting total flow removed so far.
    pub budget_used: f64,
    /// Objective before the step.
    pub objective_before: f64,
    /// Its 95% interval (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub objective_before_ci95: Option<[f64; 2]>,
    /// Objective after the step.
    pub objective_after: f64,
    /// Its 95% interval (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub objective_after_ci95: Option<[f64; 2]>,
    /// After minus before.
    pub change: f64,
    /// Paired 95% interval of the change (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub change_ci95: Option<[f64; 2]>,
    /// The gradient that ranked the shortlist.
    pub ranked_by: &'static str,
    /// The shortlist, in ranking order.
    pub candidates: Vec<CandidateRow>,
}

/// `plan` of the run document.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanResult {
    /// The selection coefficient.
    pub s: f64,
    /// `exact` or `ensemble`.
    pub method: &'static str,
    /// What is minimised.
    pub objective: &'static str,
    /// The starts averaged.
    pub starts: Vec<String>,
    /// Share of the total flow the plan may cut.
    pub budget: f64,
    /// Total inter-deme flow of the job's matrix ([`FLOW_UNIT`]).
    pub total_flow: f64,
    /// [`FLOW_UNIT`].
    pub flow_unit: &'static str,
    /// Objective of the job's matrix.
    pub baseline_objective: f64,
    /// Its 95% interval (ensembles).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub baseline_ci95: Option<[f64; 2]>,
    /// The steps.
    pub steps: Vec<PlanStepRow>,
    /// Share of the total flow the steps removed.
    pub budget_used: f64,
    /// `steps`, `budget`, `no_links` or `no_improvement`.
    pub stop_reason: &'static str,
    /// [`PLAN_LIMITS`].
    pub limits: &'static str,
}

/// The stored form of [`WhatIfResults`] (the run's `whatif` column): its non-empty members.
#[derive(Serialize)]
struct WhatIfColumn<'a> {
    #[serde(skip_serializing_if = "<[InterventionResult]>::is_empty")]
    interventions: &'a [InterventionResult],
    #[serde(skip_serializing_if = "Option::is_none")]
    plan: Option<&'a PlanResult>,
}

impl WhatIfResults {
    /// The JSON object the service stores and serves as the run document's `interventions`
    /// and `plan`; `None` when the job asked for neither.
    pub fn to_json(&self) -> Result<Option<String>, serde_json::Error> {
        if self.interventions.is_empty() && self.plan.is_none() {
            return Ok(None);
        }
        serde_json::to_string(&WhatIfColumn {
            interventions: &self.interventions,
            plan: self.plan.as_ref(),
        })
        .map(Some)
    }
}

fn pair(ci: Option<(f64, f64)>) -> Option<[f64; 2]> {
    ci.map(|(a, b)| [a, b])
}

/// What ran the job's results, for the what-ifs: `None` for approximation jobs.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Method {
    Exact,
    Ensemble,
}

fn method_of(outcome: &Outcome) -> Option<Method> {
    if outcome.method == "exact" {
        Some(Method::Exact)
    } else if outcome.method.starts_with("ensemble") {
        Some(Method::Ensemble)
    } else {
        None
    }
}

/// Splits a what-if error: cancellation stops the job, anything else becomes a warning.
fn soft(e: WhatIfError, what: &str, warnings: &mut Vec<String>) -> Result<(), ComputeError> {
    match e {
        WhatIfError::Cancelled => Err(ComputeError::Cancelled),
        other => {
            warnings.push(format!(
                "{what} could not be computed and is left out: {other}"
            ));
            Ok(())
        }
    }
}

/// Computes the what-ifs of `job` (module docs) into `outcome`, by the method of its results.
pub fn attach(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
    outcome: &mut Outcome,
) -> Result<(), ComputeError> {
    let Some(method) = method_of(outcome) else {
        return Ok(());
    };
    let whatif = job.whatif();
    let ensemble_config = || job.ensemble_config().ok_or(ComputeError::MissingSeed);
    let mut warnings = Vec::new();
    if !whatif.scenarios.is_empty() {
        for &s in job.selection() {
            let model = job.model().with_selection(s)?;
            let rows = match method {
                Method::Exact => {
                    let ev = ExactEvaluator::new(
                        job.exact_config().clone(),
                        job.starts().to_vec(),
                        pool,
                        cancel,
                    );
                    scenario_rows(job, &ev, &model, s, &mut warnings)?
                }
                Method::Ensemble => {
                    let ev = EnsembleEvaluator::new(
                        ensemble_config()?,
                        job.starts().to_vec(),
                        pool,
                        cancel,
                    );
                    scenario_rows(job, &ev, &model, s, &mut warnings)?
                }
            };
            outcome.whatif.interventions.extend(rows);
        }
        // Job order: scenarios outermost, then the sweep, then the starts.
        let order = |r: &InterventionResult| {
            whatif
                .scenarios
                .iter()
                .position(|sc| sc.name == r.name)
                .unwrap_or(usize::MAX)
        };
        outcome.whatif.interventions.sort_by_key(order);
    }
    if let Some(plan) = &whatif.plan {
        let model = job.model().with_selection(plan.s)?;
        let config = PlanConfig {
            budget: plan.budget,
            max_steps: plan.steps as usize,
            shortlist: plan.shortlist as usize,
        };
        let gradient = Some(ExactGradient {
            config: job.exact_config(),
            pool,
        });
        let made = match method {
            Method::Exact => {
                let ev = ExactEvaluator::new(
                    job.exact_config().clone(),
                    job.starts().to_vec(),
                    pool,
                    cancel,
                );
                whatif::greedy_plan(&ev, &model, &config, gradient).map(|p| (p, ev.method()))
            }
            Method::Ensemble => {
                let config_without_arrivals = EnsembleConfig {
                    arrival_fractions: Vec::new(),
                    ..ensemble_config()?
                };
                let ev = EnsembleEvaluator::new(
                    config_without_arrivals,
                    job.starts().to_vec(),
                    pool,
                    cancel,
                );
                whatif::greedy_plan(&ev, &model, &config, gradient).map(|p| (p, ev.method()))
            }
        };
        match made {
            Ok((made, name)) => outcome.whatif.plan = Some(plan_result(job, plan.s, name, &made)),
            Err(e) => soft(e, "the plan", &mut warnings)?,
        }
    }
    if method == Method::Ensemble && job.spec().outputs.sensitivity {
        let config = ensemble_config()?;
        for &s in job.selection() {
            let model = job.model().with_selection(s)?;
            for &start in job.starts() {
                match paired_link_effects(
                    &model,
                    start,
                    &config,
                    ENSEMBLE_SENSITIVITY_LINKS,
                    pool,
                    cancel,
                ) {
                    Ok(effects) => {
                        let mut rows: Vec<LinkSensitivity> = effects
                            .iter()
                            .map(|e| LinkSensitivity {
                                s,
                                start: job.start_label(start).to_owned(),
                                from: job.deme_id(e.link.from).to_owned(),
                                to: job.deme_id(e.link.to).to_owned(),
                                d_fixation_probability: e.d_fixation_probability,
                                d_mean_fixation_generations: e
                                    .d_mean_fixation_generations
                                    .filter(|d| job.spec().outputs.times && d.is_finite()),
                                method: "ensemble_paired_secant",
                                meaning: PAIRED_SENSITIVITY_MEANING,
                                flow: None,
                                d_fixation_probability_per_flow: None,
                                d_mean_fixation_generations_per_flow: None,
                                flow_meaning: None,
                                ci95: Some([e.ci95.0, e.ci95.1]),
                            })
                            .collect();
                        rows.sort_by(|a, b| {
                            a.d_fixation_probability
                                .total_cmp(&b.d_fixation_probability)
                        });
                        outcome.sensitivity.extend(rows);
                    }
                    Err(e) => soft(
                        e,
                        &format!(
                            "paired ensemble link rows (s = {s}, start `{}`)",
                            job.start_label(start)
                        ),
                        &mut warnings,
                    )?,
                }
            }
        }
    }
    outcome.warnings.extend(warnings);
    Ok(())
}

fn scenario_rows<E: Evaluator>(
    job: &ValidatedJob,
    evaluator: &E,
    model: &Model,
    s: f64,
    warnings: &mut Vec<String>,
) -> Result<Vec<InterventionResult>, ComputeError> {
    let baseline = match evaluator.run(model, whatif::Streams::Job) {
        Ok(run) => run,
        Err(e) => {
            soft(e, &format!("the interventions at s = {s}"), warnings)?;
            return Ok(Vec::new());
        }
    };
    let mut rows = Vec::new();
    for scenario in &job.whatif().scenarios {
        let changed = match whatif::intervention::scenario(model, &scenario.changes) {
            Ok(m) => m,
            Err(e) => {
                soft(WhatIfError::Intervention(e), &scenario.name, warnings)?;
                continue;
            }
        };
        match whatif::compare_scenario(evaluator, model, &baseline, &changed) {
            Ok(c) => rows.extend(
                c.per_start
                    .iter()
                    .map(|sc| intervention_row(job, &scenario.name, s, evaluator.method(), sc)),
            ),
            Err(e) => soft(
                e,
                &format!("intervention `{}` at s = {s}", scenario.name),
                warnings,
            )?,
        }
    }
    Ok(rows)
}

fn intervention_row(
    job: &ValidatedJob,
    name: &str,
    s: f64,
    method: &'static str,
    c: &StartChange,
) -> InterventionResult {
    let times = job.spec().outputs.times;
    let time = c.fixation_time.filter(|_| times);
    let fractions = &job.spec().outputs.arrival_fractions;
    let arrival = (!c.arrival.is_empty() && !fractions.is_empty() && times).then(|| {
        c.arrival
            .iter()
            .enumerate()
            .filter(|(_, by_fraction)| !by_fraction.is_empty())
            .map(|(deme, by_fraction)| {
                let inner = by_fraction
                    .iter()
                    .map(|(&f, a)| {
                        (
                            fraction_key(fractions[f]),
                            ArrivalChangeRow {
                                baseline_median: a.baseline_median,
                                scenario_median: a.scenario_median,
                                change_median: a.scenario_median - a.baseline_median,
                                change_mean: a.mean.change,
                                change_mean_ci95: pair(a.mean.ci95),
                            },
                        )
                    })
                    .collect();
                (job.deme_id(deme).to_owned(), inner)
            })
            .collect()
    });
    InterventionResult {
        name: name.to_owned(),
        s,
        start: job.start_label(c.start).to_owned(),
        method,
        baseline_fixation_probability: c.baseline.value,
        baseline_ci95: pair(c.baseline.ci95),
        scenario_fixation_probability: c.scenario.value,
        scenario_ci95: pair(c.scenario.ci95),
        change_fixation_probability: c.change.value,
        change_ci95: pair(c.change.ci95),
        interval_method: c.pairs.map(|_| PAIRED_INTERVAL),
        baseline_mean_fixation_generations: time.map(|t| t.baseline),
        scenario_mean_fixation_generations: time.map(|t| t.scenario),
        change_mean_fixation_generations: time.map(|t| t.change),
        change_mean_fixation_ci95: time.and_then(|t| pair(t.ci95)),
        pairs: c.pairs.map(|t| PairCounts {
            both_fixed: t[0][0],
            baseline_only: t[0][1],
            scenario_only: t[1][0],
            neither: t[1][1],
            unresolved: t[2].iter().sum::<u64>() + t[0][2] + t[1][2],
        }),
        arrival_change_generations: arrival,
        meaning: INTERVENTION_MEANING,
    }
}

fn plan_result(job: &ValidatedJob, s: f64, method: &'static str, plan: &Plan) -> PlanResult {
    let id = |d: usize| job.deme_id(d).to_owned();
    let value = |e: &Estimate| (e.value, pair(e.ci95));
    let steps = plan
        .steps
        .iter()
        .enumerate()
        .map(|(i, step)| {
            let (before, before_ci) = value(&step.before);
            let (after, after_ci) = value(&step.after);
            let (change, change_ci) = value(&step.change);
            PlanStepRow {
                step: i + 1,
                from: id(step.link.from),
                to: id(step.link.to),
                amount: step.amount,
                closed: step.closed,
                flow_cut: step.flow_cut,
                budget_used: step.budget_used,
                objective_before: before,
                objective_before_ci95: before_ci,
                objective_after: after,
                objective_after_ci95: after_ci,
                change,
                change_ci95: change_ci,
                ranked_by: step.ranked_by.as_str(),
                candidates: step
                    .candidates
                    .iter()
                    .map(|c| CandidateRow {
                        from: id(c.link.from),
                        to: id(c.link.to),
                        amount: c.amount,
                        predicted_change: c.predicted_change,
                        objective: c.objective.value,
                        objective_ci95: pair(c.objective.ci95),
                    })
                    .collect(),
            }
        })
        .collect();
    PlanResult {
        s,
        method,
        objective: "mean fixation probability over the job's starts",
        starts: job
            .starts()
            .iter()
            .map(|&st| job.start_label(st).to_owned())
            .collect(),
        budget: plan.budget,
        total_flow: plan.total_flow,
        flow_unit: FLOW_UNIT,
        baseline_objective: plan.baseline.value,
        baseline_ci95: pair(plan.baseline.ci95),
        steps,
        budget_used: plan.steps.last().map_or(0.0, |st| st.budget_used),
        stop_reason: plan.stop.as_str(),
        limits: PLAN_LIMITS,
    }
}
