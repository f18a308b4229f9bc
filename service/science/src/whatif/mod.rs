//! What-if interventions on movement links, evaluated against the baseline, and greedy plans
//! of link reductions under a flow budget.
//!
//! This module owns:
//!
//! * [`intervention`]: what a link is in the rule's kernel, how a change (scale a link, close
//!   it, scale every flow into or out of a deme) is applied with rows kept stochastic, and the
//!   flow measure of budgets;
//! * [`evaluate`]: the [`Evaluator`] trait with its exact and ensemble implementations, and
//!   the comparison of a scenario with its baseline per start (the change of the fixation
//!   probability with a paired interval, of the mean fixation time, and of each deme's
//!   arrival time);
//! * [`ranking`]: links ordered by a gradient, and the paired finite differences of the
//!   links an approximation ranks highest (ensemble link sensitivities);
//! * [`plan`]: the greedy plan.
//!
//! # Method and limits
//! A what-if changes the rule's kernel (`B` for death-birth and Wright-Fisher, `F` for
//! birth-death) and evaluates the changed model with the job's method. Exact: the difference
//! of two exact solves, no interval. Ensembles: the scenario's replicate `q` draws from the
//! same stream as the baseline's ([`crate::ensemble::paired`]), so the change is estimated
//! from pairs, with Newcombe's (1998) interval for the fixation probability and normal
//! intervals for the mean times; a scenario that changes nothing reproduces the baseline's
//! replicates and gives exactly zero change. Limits: a what-if is a change of the model's
//! matrix, not of behaviour the matrix does not describe (sizes stay constant, the variant's
//! fitness is unchanged); pairing narrows intervals only while the two chains make the same
//! moves, so a change that acts early on every replicate gains little; the ensemble runs of a
//! what-if are not checkpointed (an interrupted job recomputes them, with identical results).

pub mod evaluate;
pub mod intervention;
pub mod plan;
pub mod ranking;

pub use evaluate::{
    compare_scenario, Comparison, EnsembleEvaluator, Estimate, Evaluator, ExactEvaluator,
    StartChange, Streams,
};
pub use intervention::{Change, InterventionError, Link};
pub use plan::{greedy_plan, Plan, PlanConfig, PlanStep, PlanStop};
pub use ranking::{paired_link_effects, rank_links, ExactGradient, GradientSource};

use crate::ensemble::EnsembleError;
use crate::exact::ExactError;
use crate::model::Model;

/// Why a what-if or a plan cannot be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum WhatIfError {
    /// A scenario's changes cannot be applied: each failing change's index and why.
    #[error("the scenario's changes cannot be applied: {}", describe(.0))]
    Intervention(Vec<(usize, InterventionError)>),
    /// The exact method failed.
    #[error("exact method: {0}")]
    Exact(#[from] ExactError),
    /// An ensemble refused its settings.
    #[error("ensemble: {0}")]
    Ensemble(#[from] EnsembleError),
    /// Two models meant to be paired would not share their random streams.
    #[error("the scenario's replicates would not share the baseline's random streams")]
    Unpaired,
    /// No gradient could rank the links.
    #[error("no gradient could rank the links ({0})")]
    NoGradient(String),
    /// The plan's budget is outside `[0, 1]`.
    #[error("the budget {0} is outside [0, 1]")]
    Budget(f64),
    /// The cancellation flag was raised.
    #[error("the computation was cancelled")]
    Cancelled,
}

fn describe(errors: &[(usize, InterventionError)]) -> String {
    errors
        .iter()
        .map(|(i, e)| format!("change {i}: {e}"))
        .collect::<Vec<_>>()
        .join("; ")
}

/// Evaluates every scenario (a list of changes each) against `model` with `evaluator`: the
/// baseline once, then each scenario compared with it on the job's streams.
pub fn evaluate_scenarios<E: Evaluator>(
    evaluator: &E,
    model: &Model,
    scenarios: &[Vec<Change>],
) -> Result<Vec<Comparison>, WhatIfError> {
    let models = scenarios
        .iter()
        .map(|changes| intervention::scenario(model, changes).map_err(WhatIfError::Intervention))
        .collect::<Result<Vec<_>, _>>()?;
    let baseline = evaluator.run(model, Streams::Job)?;
    models
        .iter()
        .map(|scenario| compare_scenario(evaluator, model, &baseline, scenario))
        .collect()
}
