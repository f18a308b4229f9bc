//! Runs a [`ValidatedJob`] with the science crate and returns its results in document form.
//!
//! This module owns the order of work (the `selection.s` sweep outermost, starts inside, in
//! the order the job lists them), which science call answers each `(s, start)`, and the
//! warnings that only a computation can raise. Per method:
//!
//! * exact: one `exact::solve` per `s`; every start is mixed from its per-deme answers by
//!   `Start::deme_weights` and `start::combine`;
//! * ensemble: one `ensemble::run` per `(s, start)`, all on the caller's thread pool, with
//!   progress summed over the whole job;
//! * approximation: the screening approximations of `method.approximations`, the primary
//!   one chosen per `s` ([`screening`] owns the rule, the regimes' warnings and their link
//!   rows);
//! * `auto` was resolved during validation; if its exact solve fails to converge, the job
//!   falls back to ensembles with a warning.
//!
//! Every result carries the well-mixed reference for the same total size, and the screening
//! approximations beside it (for exact and ensemble results with their discrepancy, added by
//! `screening::attach` once the primary method is done).

use crate::document::{
    LinkSensitivity, RunResult, TimeUnits, FLOW_SENSITIVITY_MEANING, SENSITIVITY_MEANING,
};
use crate::spec::{MethodKind, ResolvedMethod, SelfFlowsSpec, ValidatedJob};
use demefix_science::ensemble::{
    self, Accumulator, ChunkRecord, EnsembleError, ProgressObserver, StopReason,
};
use demefix_science::exact::{self, ExactError};
use demefix_science::sensitivity::{flow_effects, KernelPartials, LinkEffect};
use demefix_science::start::combine;
use demefix_science::Orientation;
use demefix_science::Start;
use demefix_science::{well_mixed, Model, ModelError, Rule};
use std::sync::atomic::{AtomicBool, Ordering};

mod screening;

pub use screening::UNLISTED_WEAK_MAX_UNKNOWNS;

/// Results of a job and what the computation had to say about it.
#[derive(Debug, Clone, PartialEq)]
pub struct Outcome {
    /// One result per `(s, start)`.
    pub results: Vec<RunResult>,
    /// Link sensitivities, when the job asks for them and the method gives them.
    pub sensitivity: Vec<LinkSensitivity>,
    /// Warnings raised while computing (validation warnings are the job's own).
    pub warnings: Vec<String>,
    /// The method used, for provenance: `exact`, `ensemble` or `approximation:<name>`.
    pub method: String,
    /// `interventions` and `plan` ([`crate::whatif`]), empty unless the job asks for them.
    pub whatif: crate::whatif::WhatIfResults,
}

/// Why a job could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ComputeError {
    /// The exact method failed.
    #[error("exact method: {0}")]
    Exact(#[from] ExactError),
    /// The cancellation flag was raised before the job finished.
    #[error("the computation was cancelled")]
    Cancelled,
    /// The job needs a seed and has none (call `ValidatedJob::pick_seed` first).
    #[error("the job needs method.seed")]
    MissingSeed,
    /// A model could not be built (validation should have prevented this).
    #[error("model: {0}")]
    Model(#[from] ModelError),
    /// The ensemble refused its settings or its checkpoint (a checkpoint of another job).
    #[error("ensemble: {0}")]
    Ensemble(#[from] EnsembleError),
}

/// Total replicates the job's ensembles may run, for a progress bar (0 without ensembles).
pub fn ensemble_total(job: &ValidatedJob) -> u64 {
    match job.method() {
        ResolvedMethod::Ensemble => {
            let cells = (job.selection().len() * job.starts().len()) as u64;
            cells.saturating_mul(job.spec().method.replicates)
        }
        _ => 0,
    }
}

/// Reports one ensemble's progress as part of the whole job's.
struct Offset<'a> {
    inner: &'a dyn ProgressObserver,
    base: u64,
    total: u64,
}

impl ProgressObserver for Offset<'_> {
    fn on_progress(&self, done: u64, _total: u64) {
        self.inner.on_progress(self.base + done, self.total);
    }
}

fn units(job: &ValidatedJob) -> TimeUnits {
    TimeUnits {
        times: job.spec().outputs.times,
        generation_days: job.spec().dynamics.generation_days,
    }
}

fn model_at(job: &ValidatedJob, s: f64) -> Result<Model, ComputeError> {
    Ok(job.model().with_selection(s)?)
}

/// [`ComputeError::Cancelled`] once the cancellation flag is raised.
fn not_cancelled(cancel: &AtomicBool) -> Result<(), ComputeError> {
    if cancel.load(Ordering::Relaxed) {
        Err(ComputeError::Cancelled)
    } else {
        Ok(())
    }
}

/// One committed step of a job's ensembles: what one chunk added to cell `cell` (the
/// `(s, start)` pairs in job order). Storing steps, not whole accumulators, keeps every
/// commit the size of one chunk, however long the run.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct ChunkStep {
    /// Index of the cell, in job order.
    pub cell: usize,
    /// What the chunk added.
    pub record: ChunkRecord,
}

/// Where a job's ensembles stand: the steps committed so far, in the order they were made.
/// Replaying them rebuilds every cell's integer accumulator exactly, so a job resumed from a
/// checkpoint ends with results byte-identical to an uninterrupted run.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct EnsembleCheckpoint {
    /// The committed steps, oldest first.
    pub steps: Vec<ChunkStep>,
}

impl EnsembleCheckpoint {
    /// Replicates merged over all cells.
    pub fn replicates(&self) -> u64 {
        self.steps.iter().map(|step| step.record.replicates).sum()
    }
}

/// Computes every result of `job`. Ensembles and the exact solver run on `pool`; the result
/// does not depend on its number of threads.
pub fn run(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    observer: &dyn ProgressObserver,
    cancel: &AtomicBool,
) -> Result<Outcome, ComputeError> {
    run_resumable(job, pool, observer, cancel, None, &mut |_| {})
}

/// [`run`], resuming the ensembles from `resume` and handing each chunk's [`ChunkStep`] to
/// `on_chunk` (the caller commits it). Exact and approximation jobs never checkpoint.
pub fn run_resumable(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    observer: &dyn ProgressObserver,
    cancel: &AtomicBool,
    resume: Option<EnsembleCheckpoint>,
    on_chunk: &mut dyn FnMut(&ChunkStep),
) -> Result<Outcome, ComputeError> {
    let resume = resume.unwrap_or_default();
    let mut outcome = match job.method() {
        ResolvedMethod::Exact { .. } => match run_exact(job, pool, cancel) {
            Ok((results, sensitivity)) => Ok(Outcome {
                results,
                sensitivity,
                warnings: Vec::new(),
                method: "exact".to_owned(),
                whatif: Default::default(),
            }),
            Err(ComputeError::Exact(e @ ExactError::NotConverged { .. }))
                if job.spec().method.kind == MethodKind::Auto =>
            {
                let mut outcome = run_ensembles(job, pool, observer, cancel, resume, on_chunk)?;
                outcome.warnings.insert(
                    0,
                    format!("the exact method failed ({e}); method `auto` used ensembles instead"),
                );
                Ok(outcome)
            }
            Err(e) => Err(e),
        },
        ResolvedMethod::Ensemble => run_ensembles(job, pool, observer, cancel, resume, on_chunk),
        ResolvedMethod::Approximation => screening::run_approximations(job, pool, cancel),
    }?;
    screening::attach(job, pool, cancel, &mut outcome)?;
    // What-if scenarios, the plan and paired ensemble link rows (service/src/whatif.rs).
    crate::whatif::attach(job, pool, cancel, &mut outcome)?;
    Ok(outcome)
}

fn run_exact(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
) -> Result<(Vec<RunResult>, Vec<LinkSensitivity>), ComputeError> {
    let rule = job.spec().dynamics.rule;
    let total = job.population().total();
    let mut results = Vec::new();
    let mut sensitivity = Vec::new();
    for &s in job.selection() {
        not_cancelled(cancel)?;
        let model = model_at(job, s)?;
        let solution = pool.install(|| exact::solve(&model, job.exact_config()))?;
        let wm = well_mixed::reference(rule, total, s);
        for &start in job.starts() {
            let answer = combine(&start.deme_weights(&model), &solution.per_deme);
            results.push(RunResult::exact(
                s,
                job.start_label(start),
                &answer,
                &solution.report,
                &wm,
                units(job),
            ));
            if job.spec().outputs.sensitivity && rule != Rule::WrightFisher {
                not_cancelled(cancel)?;
                let weights = start.deme_weights(&model);
                let found =
                    pool.install(|| exact::sensitivity(&model, job.exact_config(), &weights))?;
                sensitivity.extend(link_rows(
                    job,
                    s,
                    start,
                    &model,
                    &found.d_fixation_probability,
                    Some(&found.d_mean_fixation_generations),
                    "exact_adjoint",
                ));
            }
        }
    }
    Ok((results, sensitivity))
}

/// The link rows of one start's kernel partials (of the fixation probability, and of the mean
/// fixation time when the method has them), computed by `method`, in api.md's sign (moving
/// probability from the link to retention), the most lowering first (ties in kernel order).
/// A `flows` job also gets each row's derivative per unit reduction of its raw flow, through
/// the normalisation (`sensitivity::flow_effects`).
fn link_rows(
    job: &ValidatedJob,
    s: f64,
    start: Start,
    model: &Model,
    fixation: &KernelPartials,
    fixation_time: Option<&KernelPartials>,
    method: &'static str,
) -> Vec<LinkSensitivity> {
    let rule = model.rule();
    let times = job.spec().outputs.times;
    let time = |d: f64| (times && d.is_finite()).then_some(d);
    let fixation = fixation.link_effects(rule);
    let fixation_time = fixation_time.map(|t| t.link_effects(rule));
    let migration = &job.spec().migration;
    let per_flow = |links: &[LinkEffect]| -> Option<Vec<f64>> {
        let retention = match migration.self_flows {
            SelfFlowsSpec::Keep => None,
            SelfFlowsSpec::Retention(p) => Some(p),
        };
        (migration.orientation == Orientation::Flows)
            .then(|| flow_effects(links, model.kernel(), &migration.matrix, retention, rule))
    };
    let fixation_per_flow = per_flow(&fixation);
    let time_per_flow = fixation_time.as_deref().and_then(per_flow);
    let mut rows: Vec<((usize, usize), LinkSensitivity)> = fixation
        .iter()
        .enumerate()
        .map(|(n, p)| {
            let flows = fixation_per_flow.is_some();
            (
                (p.row, p.col),
                LinkSensitivity {
                    s,
                    start: job.start_label(start).to_owned(),
                    from: job.deme_id(p.from).to_owned(),
                    to: job.deme_id(p.to).to_owned(),
                    d_fixation_probability: -p.derivative,
                    d_mean_fixation_generations: fixation_time
                        .as_ref()
                        .and_then(|t| time(-t[n].derivative)),
                    method,
                    meaning: SENSITIVITY_MEANING,
                    flow: flows.then(|| migration.matrix[p.from][p.to]),
                    d_fixation_probability_per_flow: fixation_per_flow.as_ref().map(|f| -f[n]),
                    d_mean_fixation_generations_per_flow: time_per_flow
                        .as_ref()
                        .and_then(|t| time(-t[n])),
                    flow_meaning: flows.then_some(FLOW_SENSITIVITY_MEANING),
                    ci95: None,
                },
            )
        })
        .collect();
    rows.sort_by(|(a_pos, a), (b_pos, b)| {
        a.d_fixation_probability
            .total_cmp(&b.d_fixation_probability)
            .then(a_pos.cmp(b_pos))
    });
    rows.into_iter().map(|(_, row)| row).collect()
}

/// The accumulator of cell `cell` rebuilt from its committed steps (`None` without any).
fn replay(
    model: &Model,
    start: Start,
    config: &ensemble::EnsembleConfig,
    cell: usize,
    checkpoint: &EnsembleCheckpoint,
) -> Result<Option<Accumulator>, ComputeError> {
    let mut steps = checkpoint
        .steps
        .iter()
        .filter(|step| step.cell == cell)
        .peekable();
    if steps.peek().is_none() {
        return Ok(None);
    }
    let mut acc = ensemble::EnsembleJob::new(model, start, config)?.accumulator();
    for step in steps {
        acc.apply(&step.record)
            .map_err(|_| ComputeError::Ensemble(EnsembleError::ForeignCheckpoint))?;
    }
    Ok(Some(acc))
}

fn run_ensembles(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    observer: &dyn ProgressObserver,
    cancel: &AtomicBool,
    resume: EnsembleCheckpoint,
    on_chunk: &mut dyn FnMut(&ChunkStep),
) -> Result<Outcome, ComputeError> {
    let config = job.ensemble_config().ok_or(ComputeError::MissingSeed)?;
    let rule = job.spec().dynamics.rule;
    let total = job.population().total();
    let ids: Vec<&str> = job.deme_ids().collect();
    let cells = (job.selection().len() * job.starts().len()) as u64;
    let grand_total = cells.saturating_mul(config.replicates);
    let mut base = 0u64;
    let mut results = Vec::new();
    let mut warnings = Vec::new();
    let mut cell = 0usize;
    // The stepping depends on the rule and the total size only, so it is the job's.
    let stepping = config.scheme.resolve(job.model());
    if let Some(bias) = stepping.known_bias(rule) {
        warnings.push(format!(
            "ensembles used the generation scheme (method.scheme = `{}`, total size {total}): \
             {bias}",
            config.scheme.as_str()
        ));
    }
    for &s in job.selection() {
        let model = model_at(job, s)?;
        let wm = well_mixed::reference(rule, total, s);
        for &start in job.starts() {
            if cancel.load(Ordering::Relaxed) {
                return Err(ComputeError::Cancelled);
            }
            let progress = Offset {
                inner: observer,
                base,
                total: grand_total,
            };
            let resumed = replay(&model, start, &config, cell, &resume)?;
            let summary = ensemble::run_resumable(
                &model,
                start,
                &config,
                pool,
                &progress,
                cancel,
                resumed,
                &mut |_, record| {
                    on_chunk(&ChunkStep {
                        cell,
                        record: record.clone(),
                    });
                },
            )?;
            cell += 1;
            if summary.stop == StopReason::Cancelled {
                return Err(ComputeError::Cancelled);
            }
            base += config.replicates;
            observer.on_progress(base, grand_total);
            let label = job.start_label(start);
            if summary.unresolved > 0 {
                warnings.push(format!(
                    "s = {s}, start `{label}`: {} of {} replicates were still unabsorbed after \
                     max_generations = {}; the interval counts them as possible fixations",
                    summary.unresolved, summary.replicates, config.max_generations
                ));
            }
            let mut result = RunResult::ensemble(
                s,
                label,
                &summary,
                &ids,
                &config.arrival_fractions,
                &wm,
                units(job),
            );
            result.method = stepping.method().to_owned();
            results.push(result);
        }
    }
    Ok(Outcome {
        results,
        sensitivity: Vec::new(),
        warnings,
        method: stepping.method().to_owned(),
        whatif: Default::default(),
    })
}
