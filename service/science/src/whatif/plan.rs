//! A greedy plan of link reductions under a flow budget.
//!
//! # Budget
//! The budget `b` in `[0, 1]` is the share of the model's total inter-deme flow (expected
//! lineage movements per generation, [`super::intervention::total_flow`]) that the plan may
//! remove. Cutting link entry `(row, col)` by `x` units of probability (moved to the row's
//! retention) removes `n_row x` of it; the plan's cuts never remove more than `b` times the
//! total flow of the model it started from.
//!
//! # Method
//! Each step:
//!
//! 1. ranks every remaining link at the current kernel by a gradient of the start-averaged
//!    fixation probability ([`super::ranking::rank_links`]: the exact adjoint when allowed and
//!    the chain fits, else an approximation) and predicts the first-order change of cutting it
//!    fully, or partly when the budget left is smaller than its flow (`-derivative x amount`);
//! 2. takes the `shortlist` links with the most negative prediction and evaluates each cut by
//!    the job's method ([`super::evaluate::Evaluator`]) on the selection streams, all
//!    candidates (and the current kernel) sharing those streams;
//! 3. keeps the candidate with the lowest estimated objective; the plan ends instead when that
//!    cut raises the objective against the current kernel (exactly: a change `>= 0`; with
//!    ensembles: the whole paired 95% interval of the change above 0, so a change inside the
//!    noise does not end it);
//! 4. re-evaluates the chosen kernel on the job's own streams and reports it against the
//!    previous step's kernel on the same streams (a paired change for ensembles), so a
//!    reported change comes from replicates that played no part in choosing the link.
//!
//! Cuts that would leave a deme fed forever by two separate source groups
//! ([`super::intervention::stays_mixed`]) are never shortlisted: that chain is never absorbed.
//!
//! # Limits
//! * Greedy is not optimal: the best set of cuts can contain links that no single step
//!   would pick first, and a step never undoes an earlier one.
//! * The shortlist is first order: a link whose full cut matters more than its gradient
//!   says (strong curvature, or a cut that disconnects demes) is seen only if the gradient
//!   ranks it into the shortlist.
//! * Each step removes as much of the chosen link as the budget allows, so a link with a large
//!   effect per unit flow but a small flow can lose to a larger link.
//! * With ensembles the choice is noisy: two candidates whose objectives differ by less than
//!   the paired noise of the selection streams may be ranked the wrong way round. The reported
//!   figures are unbiased by the choice (step 4), and a reported step whose change interval
//!   covers 0 cut a link whose effect the replicates could not resolve.

use super::evaluate::{Estimate, Evaluator, Streams};
use super::intervention::{stays_mixed, total_flow, KernelEdit, Link};
use super::ranking::{rank_links, ExactGradient, GradientSource};
use super::WhatIfError;
use crate::migration::StochasticMatrix;
use crate::model::Model;

/// The budget left below which the plan counts it as spent, relative to the total flow.
const SPENT: f64 = 1e-12;

/// Settings of a greedy plan.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PlanConfig {
    /// Share of the total inter-deme flow the plan may cut, in `[0, 1]`.
    pub budget: f64,
    /// Most links cut (steps).
    pub max_steps: usize,
    /// Candidates evaluated per step (at least 1).
    pub shortlist: usize,
}

/// A candidate of one step.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    /// The link.
    pub link: Link,
    /// Probability the cut would move to retention.
    pub amount: f64,
    /// First-order change of the objective predicted by the ranking gradient.
    pub predicted_change: f64,
    /// The objective after the cut, estimated on the selection streams.
    pub objective: Estimate,
}

/// One step of the plan.
#[derive(Debug, Clone, PartialEq)]
pub struct PlanStep {
    /// The link cut.
    pub link: Link,
    /// Kernel position of the link.
    pub position: (usize, usize),
    /// Probability moved from the link to its row's retention.
    pub amount: f64,
    /// Whether the link was closed (its whole probability moved).
    pub closed: bool,
    /// Flow removed by this step (movements per generation).
    pub flow_cut: f64,
    /// Share of the starting total flow removed by this and every earlier step.
    pub budget_used: f64,
    /// Objective before the step, job streams.
    pub before: Estimate,
    /// Objective after the step, job streams.
    pub after: Estimate,
    /// `after - before`, paired for ensembles.
    pub change: Estimate,
    /// The gradient that made the shortlist.
    pub ranked_by: GradientSource,
    /// The shortlist, in ranking order, with each candidate's selection estimate.
    pub candidates: Vec<Candidate>,
}

/// Why the plan stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PlanStop {
    /// `max_steps` links were cut.
    Steps,
    /// The budget is spent.
    Budget,
    /// No link is left that can be cut (every remaining cut would leave a deme fed forever
    /// by two separate source groups, [`super::intervention::stays_mixed`]).
    NoLinks,
    /// The best shortlisted cut raises the objective (step 3 of the module docs).
    NoImprovement,
}

impl PlanStop {
    /// Name for documents.
    pub fn as_str(self) -> &'static str {
        match self {
            PlanStop::Steps => "steps",
            PlanStop::Budget => "budget",
            PlanStop::NoLinks => "no_links",
            PlanStop::NoImprovement => "no_improvement",
        }
    }
}

/// A greedy plan (module docs).
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    /// Total inter-deme flow of the starting model (movements per generation).
    pub total_flow: f64,
    /// The budget share.
    pub budget: f64,
    /// Objective of the starting model, job streams.
    pub baseline: Estimate,
    /// The steps taken.
    pub steps: Vec<PlanStep>,
    /// Why it stopped.
    pub stop: PlanStop,
    /// The kernel after the last step.
    pub kernel: StochasticMatrix,
}

/// Whether the best cut raises the objective: exactly (no interval), when its change is not
/// negative; with noise, when the whole 95% interval of the paired change lies above 0 (a
/// change inside the noise does not stop the plan).
fn raises(change: &Estimate) -> bool {
    match change.ci95 {
        None => change.value >= 0.0,
        Some((lo, _)) => lo > 0.0,
    }
}

/// The start weights of the objective: the mean of the evaluator's starts' deme weights.
fn objective_weights<E: Evaluator>(evaluator: &E, model: &Model) -> Vec<f64> {
    let starts = evaluator.starts();
    let mut w = vec![0.0; model.demes()];
    for start in starts {
        for (acc, x) in w.iter_mut().zip(start.deme_weights(model)) {
            *acc += x / starts.len() as f64;
        }
    }
    w
}

/// Builds the greedy plan for `model` (module docs). `exact` allows the exact adjoint for the
/// ranking.
pub fn greedy_plan<E: Evaluator>(
    evaluator: &E,
    model: &Model,
    config: &PlanConfig,
    exact: Option<ExactGradient<'_>>,
) -> Result<Plan, WhatIfError> {
    if !(0.0..=1.0).contains(&config.budget) {
        return Err(WhatIfError::Budget(config.budget));
    }
    let total = total_flow(model);
    let allowed = config.budget * total;
    let mut used = 0.0;
    let mut current = model.clone();
    let mut job_run = evaluator.run(model, Streams::Job)?;
    let baseline = evaluator.objective(&job_run);
    let mut selection_run = if evaluator.deterministic() {
        None
    } else {
        Some(evaluator.run(model, Streams::Selection)?)
    };
    let mut steps = Vec::new();
    let stop = loop {
        if steps.len() >= config.max_steps {
            break PlanStop::Steps;
        }
        let left = allowed - used;
        if left <= SPENT * total {
            break PlanStop::Budget;
        }
        let ranking = rank_links(&current, &objective_weights(evaluator, &current), exact)?;
        let n = current.sizes();
        let mut shortlist: Vec<(f64, usize, usize, f64)> = ranking
            .links
            .iter()
            .map(|e| {
                let amount = current
                    .kernel()
                    .get(e.row, e.col)
                    .min(left / n[e.row] as f64);
                (-e.derivative * amount, e.row, e.col, amount)
            })
            .filter(|&(_, _, _, amount)| amount > 0.0)
            .collect();
        if shortlist.is_empty() {
            break PlanStop::NoLinks;
        }
        shortlist.sort_by(|a, b| a.0.total_cmp(&b.0).then((a.1, a.2).cmp(&(b.1, b.2))));
        let mut evaluated = Vec::with_capacity(config.shortlist.max(1));
        for &(predicted_change, row, col, amount) in &shortlist {
            if evaluated.len() >= config.shortlist.max(1) {
                break;
            }
            let mut edit = KernelEdit::new(current.kernel());
            edit.cut(row, col, amount);
            let cut = current
                .with_kernel(edit.finish())
                .expect("the kernel keeps its dimension");
            if stays_mixed(&cut).is_some() {
                continue;
            }
            let run = evaluator.run(&cut, Streams::Selection)?;
            let candidate = Candidate {
                link: Link::at(current.rule(), row, col),
                amount,
                predicted_change,
                objective: evaluator.objective(&run),
            };
            evaluated.push((candidate, (row, col), cut, run));
        }
        if evaluated.is_empty() {
            break PlanStop::NoLinks;
        }
        let best = (0..evaluated.len())
            .min_by(|&a, &b| {
                evaluated[a]
                    .0
                    .objective
                    .value
                    .total_cmp(&evaluated[b].0.objective.value)
                    .then(a.cmp(&b))
            })
            .expect("a non-empty shortlist");
        // The best cut against the current kernel, on the selection streams (paired).
        let current_run = selection_run.as_ref().unwrap_or(&job_run);
        let gain = evaluator
            .compare(current_run, &evaluated[best].3)
            .objective_change;
        if raises(&gain) {
            break PlanStop::NoImprovement;
        }
        let candidates: Vec<Candidate> = evaluated.iter().map(|e| e.0.clone()).collect();
        let (chosen, position, cut, run) = evaluated.swap_remove(best);
        let after_run = if evaluator.deterministic() {
            run.clone()
        } else {
            evaluator.run(&cut, Streams::Job)?
        };
        let comparison = evaluator.compare(&job_run, &after_run);
        let entry = current.kernel().get(position.0, position.1);
        let closed = chosen.amount >= entry;
        let flow_cut = n[position.0] as f64 * chosen.amount;
        // A partial cut spends exactly what is left (the product above may round past it).
        used = if closed { used + flow_cut } else { allowed }.min(allowed);
        steps.push(PlanStep {
            link: chosen.link,
            position,
            amount: chosen.amount,
            closed,
            flow_cut,
            budget_used: if total > 0.0 {
                (used / total).min(config.budget)
            } else {
                0.0
            },
            before: comparison.baseline_objective,
            after: comparison.scenario_objective,
            change: comparison.objective_change,
            ranked_by: ranking.source,
            candidates,
        });
        job_run = after_run;
        if selection_run.is_some() {
            selection_run = Some(run);
        }
        current = cut;
    };
    Ok(Plan {
        total_flow: total,
        budget: config.budget,
        baseline,
        steps,
        stop,
        kernel: current.kernel().clone(),
    })
}
