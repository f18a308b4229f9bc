//! Ensemble method: independent seeded replicates of the chain on the count vector.
//!
//! OWNER: ensemble helper. Public signatures below are the contract used by the rest of the
//! project; fields may be added, not renamed or removed.

use crate::model::Model;
use crate::start::Start;
use std::collections::BTreeMap;
use std::sync::atomic::AtomicBool;

/// Settings of one ensemble.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleConfig {
    /// Job seed `S`.
    pub seed: u64,
    /// Maximum number of replicates.
    pub replicates: u64,
    /// Replicates per chunk (the unit of progress, early stopping and checkpoints).
    pub chunk_size: u64,
    /// Stop once the Wilson 95% half-width is at most this (checked after whole chunks).
    pub target_half_width: Option<f64>,
    /// A replicate still running after this many generations is counted as unresolved.
    pub max_generations: u64,
    /// Frequencies in `(0, 1]` whose first arrival per deme is recorded.
    pub arrival_fractions: Vec<f64>,
}

/// Receives progress after every chunk. Called from the driver thread.
pub trait ProgressObserver: Sync {
    /// `done` of at most `total` replicates are finished.
    fn on_progress(&self, done: u64, total: u64);
}

/// An observer that ignores progress.
pub struct NoProgress;

impl ProgressObserver for NoProgress {
    fn on_progress(&self, _done: u64, _total: u64) {}
}

/// Why an ensemble stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StopReason {
    /// All requested replicates ran.
    Completed,
    /// The interval reached `target_half_width`.
    TargetReached,
    /// The cancellation flag was raised; the summary covers the whole chunks done.
    Cancelled,
}

/// Quantiles of a time, in generations.
#[derive(Debug, Clone, PartialEq)]
pub struct TimeQuantiles {
    /// 5% quantile.
    pub q05: f64,
    /// Median.
    pub median: f64,
    /// 95% quantile.
    pub q95: f64,
}

/// Aggregate of an ensemble for one start and one `s`.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleSummary {
    /// Replicates run.
    pub replicates: u64,
    /// Replicates that fixed.
    pub fixed: u64,
    /// Replicates absorbed without fixing.
    pub lost: u64,
    /// Replicates that reached `max_generations` unabsorbed.
    pub unresolved: u64,
    /// `fixed / replicates`.
    pub fixation_probability: f64,
    /// Wilson 95% interval (widened to count unresolved replicates as possible fixations).
    pub ci95: (f64, f64),
    /// Mean absorption time over absorbed replicates, in generations.
    pub mean_absorption_generations: Option<f64>,
    /// Mean fixation time over fixing replicates, in generations.
    pub mean_fixation_generations: Option<f64>,
    /// Quantiles of the fixation time over fixing replicates.
    pub fixation_quantiles: Option<TimeQuantiles>,
    /// Quantiles of the absorption time over absorbed replicates.
    pub absorption_quantiles: Option<TimeQuantiles>,
    /// `arrival[deme][f]`: quantiles of the first generation the variant's frequency in the
    /// deme reaches `arrival_fractions[f]`, among fixing replicates.
    pub arrival: Vec<BTreeMap<usize, TimeQuantiles>>,
    /// Why the ensemble stopped.
    pub stop: StopReason,
}

/// Runs the ensemble for one start on the given thread pool.
pub fn run(
    model: &Model,
    start: Start,
    config: &EnsembleConfig,
    pool: &rayon::ThreadPool,
    observer: &dyn ProgressObserver,
    cancel: &AtomicBool,
) -> EnsembleSummary {
    let _ = (model, start, config, pool, observer, cancel);
    unimplemented!("ensemble::run")
}
