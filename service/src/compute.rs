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
//! * approximation: the well-mixed reference (the only approximation wired in so far);
//! * `auto` was resolved during validation; if its exact solve fails to converge, the job
//!   falls back to ensembles with a warning.
//!
//! Every result carries the well-mixed reference for the same total size.

use crate::document::{LinkSensitivity, RunResult, TimeUnits, SENSITIVITY_MEANING};
use crate::spec::{MethodKind, ResolvedMethod, ValidatedJob};
use demefix_science::ensemble::{
    self, Accumulator, ChunkRecord, EnsembleError, ProgressObserver, StopReason,
};
use demefix_science::exact::{self, ExactError};
use demefix_science::start::combine;
use demefix_science::Start;
use demefix_science::{well_mixed, Model, ModelError, Rule};
use std::sync::atomic::{AtomicBool, Ordering};

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
    match job.method() {
        ResolvedMethod::Exact { .. } => match run_exact(job, pool, cancel) {
            Ok((results, sensitivity)) => Ok(Outcome {
                results,
                sensitivity,
                warnings: Vec::new(),
                method: "exact".to_owned(),
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
        ResolvedMethod::Approximation => {
            let rule = job.spec().dynamics.rule;
            let total = job.population().total();
            let mut results = Vec::new();
            for &s in job.selection() {
                let wm = well_mixed::reference(rule, total, s);
                for &start in job.starts() {
                    results.push(RunResult::approximation(s, job.start_label(start), &wm));
                }
            }
            let method = results
                .first()
                .map_or_else(|| "approximation".to_owned(), |r| r.method.clone());
            Ok(Outcome {
                results,
                sensitivity: Vec::new(),
                warnings: Vec::new(),
                method,
            })
        }
    }
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
        if cancel.load(Ordering::Relaxed) {
            return Err(ComputeError::Cancelled);
        }
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
                if cancel.load(Ordering::Relaxed) {
                    return Err(ComputeError::Cancelled);
                }
                let weights = start.deme_weights(&model);
                let found =
                    pool.install(|| exact::sensitivity(&model, job.exact_config(), &weights))?;
                sensitivity.extend(link_rows(job, s, start, &model, &found));
            }
        }
    }
    Ok((results, sensitivity))
}

/// The link rows of one exact sensitivity, in api.md's sign (moving probability from the link
/// to retention), the most lowering first (ties in kernel order).
fn link_rows(
    job: &ValidatedJob,
    s: f64,
    start: Start,
    model: &Model,
    found: &exact::ExactSensitivity,
) -> Vec<LinkSensitivity> {
    let rule = model.rule();
    let times = job.spec().outputs.times;
    let fixation = found.d_fixation_probability.link_effects(rule);
    let fixation_time = found.d_mean_fixation_generations.link_effects(rule);
    let mut rows: Vec<((usize, usize), LinkSensitivity)> = fixation
        .iter()
        .zip(&fixation_time)
        .map(|(p, t)| {
            let d_time = -t.derivative;
            (
                (p.row, p.col),
                LinkSensitivity {
                    s,
                    start: job.start_label(start).to_owned(),
                    from: job.deme_id(p.from).to_owned(),
                    to: job.deme_id(p.to).to_owned(),
                    d_fixation_probability: -p.derivative,
                    d_mean_fixation_generations: (times && d_time.is_finite()).then_some(d_time),
                    method: "exact_adjoint",
                    meaning: SENSITIVITY_MEANING,
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
            results.push(RunResult::ensemble(
                s,
                label,
                &summary,
                &ids,
                &config.arrival_fractions,
                &wm,
                units(job),
            ));
        }
    }
    Ok(Outcome {
        results,
        sensitivity: Vec::new(),
        warnings,
        method: "ensemble".to_owned(),
    })
}
