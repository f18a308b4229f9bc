//! Evaluating a kernel and comparing two: the [`Evaluator`] trait and its exact and ensemble
//! implementations.
//!
//! An evaluator answers, for one model, every start of the job (a [`Evaluator::Run`]), and
//! compares two runs start by start. The exact evaluator solves the chain; a comparison is the
//! difference of two solves and carries no interval. The ensemble evaluator keeps each start's
//! replicate outcomes in replicate order; a comparison pairs replicate `q` of one run with
//! replicate `q` of the other ([`crate::ensemble::paired`]), which drew from the same stream.
//!
//! The objective of a plan is the start-averaged fixation probability: the plain mean over the
//! job's starts. Its interval, and that of its change, combine the per-start 95% intervals as
//! independent normal errors (the starts' ensembles draw from different streams), each start's
//! standard error read off its interval as `se = (hi - lo) / (2 z)`; with one start the
//! start's own interval is used (common practice).

use super::WhatIfError;
use crate::ensemble::paired::{self, ArrivalChange, MeanChange};
use crate::ensemble::{End, EnsembleConfig, EnsembleJob, ReplicateOutcome};
use crate::exact::{self, ExactConfig};
use crate::model::Model;
use crate::start::{combine, DemeAnswer, Start};
use crate::stats::{fixation_interval, Z95};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};

/// A value with its 95% interval (`None` for an exact value).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Estimate {
    /// The value.
    pub value: f64,
    /// 95% interval.
    pub ci95: Option<(f64, f64)>,
}

impl Estimate {
    /// An exact value.
    pub fn exact(value: f64) -> Self {
        Self { value, ci95: None }
    }
}

/// The plain mean of `parts`, with the combined interval of the module docs (`None` as soon
/// as one part has none).
pub fn mean_of(parts: &[Estimate]) -> Estimate {
    let count = parts.len().max(1) as f64;
    let value = parts.iter().map(|p| p.value).sum::<f64>() / count;
    let ci95 = match parts {
        [one] => one.ci95,
        _ => parts
            .iter()
            .map(|p| p.ci95.map(|(lo, hi)| ((hi - lo) / (2.0 * Z95)).powi(2)))
            .sum::<Option<f64>>()
            .map(|var| {
                let half = Z95 * var.sqrt() / count;
                (value - half, value + half)
            }),
    };
    Estimate { value, ci95 }
}

/// Which random streams a run draws from. Plans choose links on one set and report on the
/// other, so a reported change is not biased by the choice it made.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Streams {
    /// The job's own streams (those of its results).
    Job,
    /// Independent streams used only to choose between candidates.
    Selection,
}

/// Per start: how one scenario compares with its baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct StartChange {
    /// The start.
    pub start: Start,
    /// Fixation probability of the baseline.
    pub baseline: Estimate,
    /// Fixation probability of the scenario.
    pub scenario: Estimate,
    /// `scenario - baseline`, with a paired interval for ensembles.
    pub change: Estimate,
    /// Mean conditional fixation time (generations) of both and its change, when both can
    /// fix.
    pub fixation_time: Option<MeanChange>,
    /// Ensembles: `arrival[deme]`, arrival-fraction index to the change of the first-arrival
    /// time; empty for the exact method.
    pub arrival: Vec<BTreeMap<usize, ArrivalChange>>,
    /// Ensembles: the pair table (`[baseline end][scenario end]`, 0 fixed, 1 lost,
    /// 2 unresolved).
    pub pairs: Option<[[u64; 3]; 3]>,
}

/// A scenario against its baseline, per start and on the start-averaged objective.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// In the evaluator's start order.
    pub per_start: Vec<StartChange>,
    /// Start-averaged fixation probability of the baseline.
    pub baseline_objective: Estimate,
    /// Start-averaged fixation probability of the scenario.
    pub scenario_objective: Estimate,
    /// Change of the start-averaged fixation probability.
    pub objective_change: Estimate,
}

fn comparison(per_start: Vec<StartChange>) -> Comparison {
    let pick = |f: fn(&StartChange) -> Estimate| -> Estimate {
        mean_of(&per_start.iter().map(f).collect::<Vec<_>>())
    };
    Comparison {
        baseline_objective: pick(|c| c.baseline),
        scenario_objective: pick(|c| c.scenario),
        objective_change: pick(|c| c.change),
        per_start,
    }
}

/// Evaluates models by one method for a fixed list of starts.
pub trait Evaluator {
    /// What one evaluation of a model keeps.
    type Run: Clone;
    /// `exact` or `ensemble`.
    fn method(&self) -> &'static str;
    /// The starts every run answers, in order.
    fn starts(&self) -> &[Start];
    /// Whether a run's answer is the same on every stream set (no randomness).
    fn deterministic(&self) -> bool;
    /// Evaluates `model` on `streams`.
    fn run(&self, model: &Model, streams: Streams) -> Result<Self::Run, WhatIfError>;
    /// The start-averaged fixation probability of a run.
    fn objective(&self, run: &Self::Run) -> Estimate;
    /// `scenario` against `baseline`, which must come from the same stream set.
    fn compare(&self, baseline: &Self::Run, scenario: &Self::Run) -> Comparison;
}

/// The exact method: one solve per model, every start mixed from the per-deme answers.
pub struct ExactEvaluator<'a> {
    config: ExactConfig,
    starts: Vec<Start>,
    pool: &'a rayon::ThreadPool,
    cancel: &'a AtomicBool,
}

impl<'a> ExactEvaluator<'a> {
    /// An exact evaluator for `starts`, solving on `pool`; `cancel` is checked before each
    /// solve.
    pub fn new(
        config: ExactConfig,
        starts: Vec<Start>,
        pool: &'a rayon::ThreadPool,
        cancel: &'a AtomicBool,
    ) -> Self {
        Self {
            config,
            starts,
            pool,
            cancel,
        }
    }
}

/// An exact evaluation: each start's answer.
#[derive(Debug, Clone, PartialEq)]
pub struct ExactRun {
    /// Per start, in the evaluator's order.
    pub per_start: Vec<DemeAnswer>,
}

impl Evaluator for ExactEvaluator<'_> {
    type Run = ExactRun;

    fn method(&self) -> &'static str {
        "exact"
    }

    fn starts(&self) -> &[Start] {
        &self.starts
    }

    fn deterministic(&self) -> bool {
        true
    }

    fn run(&self, model: &Model, _streams: Streams) -> Result<ExactRun, WhatIfError> {
        if self.cancel.load(Ordering::Relaxed) {
            return Err(WhatIfError::Cancelled);
        }
        let solution = self.pool.install(|| exact::solve(model, &self.config))?;
        Ok(ExactRun {
            per_start: self
                .starts
                .iter()
                .map(|s| combine(&s.deme_weights(model), &solution.per_deme))
                .collect(),
        })
    }

    fn objective(&self, run: &ExactRun) -> Estimate {
        let parts: Vec<Estimate> = run
            .per_start
            .iter()
            .map(|a| Estimate::exact(a.fixation_probability))
            .collect();
        mean_of(&parts)
    }

    fn compare(&self, baseline: &ExactRun, scenario: &ExactRun) -> Comparison {
        let per_start = self
            .starts
            .iter()
            .zip(baseline.per_start.iter().zip(&scenario.per_start))
            .map(|(&start, (a, b))| {
                let (ta, tb) = (a.mean_fixation_generations, b.mean_fixation_generations);
                StartChange {
                    start,
                    baseline: Estimate::exact(a.fixation_probability),
                    scenario: Estimate::exact(b.fixation_probability),
                    change: Estimate::exact(b.fixation_probability - a.fixation_probability),
                    fixation_time: (ta.is_finite() && tb.is_finite()).then_some(MeanChange {
                        baseline: ta,
                        scenario: tb,
                        change: tb - ta,
                        ci95: None,
                    }),
                    arrival: Vec::new(),
                    pairs: None,
                }
            })
            .collect();
        comparison(per_start)
    }
}

/// The ensemble method: every start's replicates kept in order, compared in pairs.
pub struct EnsembleEvaluator<'a> {
    config: EnsembleConfig,
    starts: Vec<Start>,
    pool: &'a rayon::ThreadPool,
    cancel: &'a AtomicBool,
}

impl<'a> EnsembleEvaluator<'a> {
    /// An ensemble evaluator for `starts` with `config` (`config.replicates` replicates per
    /// start, early stopping ignored), running on `pool`; `cancel` is checked between chunks.
    pub fn new(
        config: EnsembleConfig,
        starts: Vec<Start>,
        pool: &'a rayon::ThreadPool,
        cancel: &'a AtomicBool,
    ) -> Self {
        Self {
            config,
            starts,
            pool,
            cancel,
        }
    }

    /// The settings of a run on `streams`: the job's seed, or the selection seed derived
    /// from it ([`selection_seed`]).
    fn config_for(&self, streams: Streams) -> EnsembleConfig {
        let mut config = self.config.clone();
        if streams == Streams::Selection {
            config.seed = selection_seed(config.seed);
        }
        config
    }
}

/// The seed of the selection streams: the first 8 bytes (little endian) of SHA-256 over
/// `b"demefix/whatif/selection/v1"` and the job seed (little endian).
pub fn selection_seed(seed: u64) -> u64 {
    let mut h = Sha256::new();
    h.update(b"demefix/whatif/selection/v1");
    h.update(seed.to_le_bytes());
    let digest: [u8; 32] = h.finalize().into();
    u64::from_le_bytes(digest[..8].try_into().expect("8 bytes"))
}

/// An ensemble evaluation: each start's replicate outcomes in replicate order.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleRun {
    /// Per start, in the evaluator's order.
    pub per_start: Vec<Vec<ReplicateOutcome>>,
    /// Ticks per generation of the model.
    pub ticks_per_generation: u64,
    /// Number of demes.
    pub demes: usize,
}

/// Fixation probability of one outcome list with the ensemble's interval: Wilson lower bound
/// of `fixed / n`, Wilson upper bound of `(fixed + unresolved) / n`.
fn fixation_estimate(outcomes: &[ReplicateOutcome]) -> Estimate {
    let n = outcomes.len() as u64;
    let count = |end: End| outcomes.iter().filter(|o| o.end == end).count() as u64;
    let (fixed, unresolved) = (count(End::Fixed), count(End::Unresolved));
    Estimate {
        value: if n > 0 { fixed as f64 / n as f64 } else { 0.0 },
        ci95: Some(fixation_interval(fixed, unresolved, n)),
    }
}

impl Evaluator for EnsembleEvaluator<'_> {
    type Run = EnsembleRun;

    fn method(&self) -> &'static str {
        "ensemble"
    }

    fn starts(&self) -> &[Start] {
        &self.starts
    }

    fn deterministic(&self) -> bool {
        false
    }

    fn run(&self, model: &Model, streams: Streams) -> Result<EnsembleRun, WhatIfError> {
        let config = self.config_for(streams);
        let mut per_start = Vec::with_capacity(self.starts.len());
        let mut ticks_per_generation = 1;
        for &start in &self.starts {
            let job = EnsembleJob::new(model, start, &config)?;
            ticks_per_generation = job.ticks_per_generation();
            per_start.push(
                paired::outcomes(&job, self.pool, self.cancel).ok_or(WhatIfError::Cancelled)?,
            );
        }
        Ok(EnsembleRun {
            per_start,
            ticks_per_generation,
            demes: model.demes(),
        })
    }

    fn objective(&self, run: &EnsembleRun) -> Estimate {
        let parts: Vec<Estimate> = run.per_start.iter().map(|o| fixation_estimate(o)).collect();
        mean_of(&parts)
    }

    fn compare(&self, baseline: &EnsembleRun, scenario: &EnsembleRun) -> Comparison {
        let fractions = self.config.arrival_fractions.len();
        let per_start = self
            .starts
            .iter()
            .zip(baseline.per_start.iter().zip(&scenario.per_start))
            .map(|(&start, (a, b))| {
                let p = paired::compare(
                    a,
                    b,
                    baseline.ticks_per_generation,
                    baseline.demes,
                    fractions,
                );
                StartChange {
                    start,
                    baseline: Estimate {
                        value: p.baseline_fixation_probability,
                        ci95: Some(p.baseline_ci95),
                    },
                    scenario: Estimate {
                        value: p.scenario_fixation_probability,
                        ci95: Some(p.scenario_ci95),
                    },
                    change: Estimate {
                        value: p.change_fixation_probability,
                        ci95: Some(p.ci95),
                    },
                    fixation_time: p.fixation_time,
                    arrival: p.arrival,
                    pairs: Some(p.table),
                }
            })
            .collect();
        comparison(per_start)
    }
}

/// One what-if scenario against the baseline model, both evaluated on the job's streams. A
/// deterministic evaluator reuses the baseline's answer when the scenario's kernel is the
/// baseline's, bit for bit.
pub fn compare_scenario<E: Evaluator>(
    evaluator: &E,
    baseline_model: &Model,
    baseline: &E::Run,
    scenario_model: &Model,
) -> Result<Comparison, WhatIfError> {
    let run = if evaluator.deterministic() && scenario_model.kernel() == baseline_model.kernel() {
        baseline.clone()
    } else {
        evaluator.run(scenario_model, Streams::Job)?
    };
    Ok(evaluator.compare(baseline, &run))
}
