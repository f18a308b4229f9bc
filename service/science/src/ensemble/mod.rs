//! Ensemble method: independent seeded replicates of the chain on the count vector.
//!
//! This module owns the simulation of replicates ([`chain`]: a pure step on a replicate
//! state), their random streams ([`stream`]), the resumable aggregate ([`Accumulator`]) and
//! the driver ([`run`], [`run_resumable`]) that owns limits, cancellation and progress and
//! says why it stopped.
//!
//! Reproducibility: replicate `q` draws only from its own stream (see [`stream`]); chunks run
//! in parallel on the caller's pool but are merged in replicate order, times are kept as
//! integer ticks and means and quantiles are computed only at the end, and early stopping is
//! judged at a fixed grid of replicate counts ([`EARLY_STOP_GRID`]). The summary is therefore
//! bit-identical for any thread count, any chunk size, and across an interruption and resume.
use crate::model::Model;
use crate::start::Start;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::ops::Range;
use std::sync::atomic::{AtomicBool, Ordering};

mod accumulator;
pub mod chain;
pub mod paired;
pub mod scheme;
pub mod stream;
mod tree;

pub use accumulator::{Accumulator, ChunkOutcome, ChunkRecord, ReplayError, EARLY_STOP_GRID};
pub use chain::{End, ReplicateOutcome};
use chain::{Replicate, Tables};
pub use scheme::{Scheme, Stepping};

/// Settings of one ensemble.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleConfig {
    /// Job seed `S`.
    pub seed: u64,
    /// Maximum number of replicates.
    pub replicates: u64,
    /// Replicates per chunk (the unit of progress, cancellation and checkpoints; 0 is read
    /// as 1). It never changes the results.
    pub chunk_size: u64,
    /// Stop once half the width of the reported 95% interval (`ci95`) is at most this. The
    /// criterion is judged, in replicate order, at every multiple of [`EARLY_STOP_GRID`]
    /// replicates; when it first holds at `g`, exactly the first `g` replicates are kept.
    pub target_half_width: Option<f64>,
    /// A replicate still running after this many generations is counted as unresolved.
    pub max_generations: u64,
    /// Frequencies in `(0, 1]` whose first arrival per deme is recorded.
    pub arrival_fractions: Vec<f64>,
    /// How death-birth and birth-death replicates step through time (see [`scheme`]);
    /// Wright-Fisher is always stepped by generations.
    pub scheme: Scheme,
}

impl Default for EnsembleConfig {
    /// The job defaults (DEVELOPERS.md, "Defaults and limits of a job") with seed 0 and no
    /// arrival fractions, so that callers can write `..EnsembleConfig::default()`.
    fn default() -> Self {
        Self {
            seed: 0,
            replicates: 10_000,
            chunk_size: 1_000,
            target_half_width: None,
            max_generations: 10_000_000,
            arrival_fractions: Vec::new(),
            scheme: Scheme::Auto,
        }
    }
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
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StopReason {
    /// All requested replicates ran.
    Completed,
    /// The interval reached `target_half_width`.
    TargetReached,
    /// The cancellation flag was raised; the summary covers the whole chunks done.
    Cancelled,
}

/// Quantiles of a time, in generations.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TimeQuantiles {
    /// 5% quantile.
    pub q05: f64,
    /// Median.
    pub median: f64,
    /// 95% quantile.
    pub q95: f64,
}

/// Aggregate of an ensemble for one start and one `s`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
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

/// Why an ensemble cannot run as configured.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EnsembleError {
    /// The start names a deme that does not exist.
    #[error("start deme {deme} does not exist (there are {demes} demes)")]
    StartOutOfRange {
        /// Requested deme.
        deme: usize,
        /// Number of demes.
        demes: usize,
    },
    /// An arrival fraction is outside `(0, 1]`.
    #[error("arrival fraction {value} is outside (0, 1]")]
    ArrivalFraction {
        /// The offending value.
        value: f64,
    },
    /// A checkpoint was made by a job with another cell, seed or result-changing setting.
    #[error("the checkpoint belongs to another ensemble")]
    ForeignCheckpoint,
}

/// One cell (model, start, settings) prepared for running: the shared read-only tables and
/// the key of its random streams.
#[derive(Debug, Clone)]
pub struct EnsembleJob<'a> {
    model: &'a Model,
    config: EnsembleConfig,
    key: [u8; 32],
    fingerprint: [u8; 32],
    stepping: Stepping,
    tables: Tables,
}

impl<'a> EnsembleJob<'a> {
    /// Checks the start and the arrival fractions and builds the tables.
    pub fn new(
        model: &'a Model,
        start: Start,
        config: &EnsembleConfig,
    ) -> Result<Self, EnsembleError> {
        if let Start::Deme(deme) = start {
            if deme >= model.demes() {
                return Err(EnsembleError::StartOutOfRange {
                    deme,
                    demes: model.demes(),
                });
            }
        }
        if let Some(&value) = config
            .arrival_fractions
            .iter()
            .find(|f| !(**f > 0.0 && **f <= 1.0))
        {
            return Err(EnsembleError::ArrivalFraction { value });
        }
        let key = stream::cell_key(config.seed, model, start);
        let mut h = Sha256::new();
        h.update(b"demefix/ensemble/checkpoint/v1");
        h.update(key);
        h.update(config.replicates.to_le_bytes());
        h.update(config.max_generations.to_le_bytes());
        h.update(
            config
                .target_half_width
                .map_or(u64::MAX, f64::to_bits)
                .to_le_bytes(),
        );
        h.update((config.arrival_fractions.len() as u64).to_le_bytes());
        for f in &config.arrival_fractions {
            h.update(f.to_bits().to_le_bytes());
        }
        // The stepping changes results. Only the generation scheme of an event rule adds
        // bytes, so event-scheme and Wright-Fisher checkpoints keep the fingerprints they had.
        let stepping = config.scheme.resolve(model);
        if stepping.leaps(model.rule()) {
            h.update(b"stepping/generation/v1");
        }
        Ok(Self {
            model,
            config: config.clone(),
            key,
            fingerprint: h.finalize().into(),
            stepping,
            tables: Tables::new(
                model,
                start,
                config.max_generations,
                &config.arrival_fractions,
                stepping,
            ),
        })
    }

    /// The stepping the replicates use (the config's scheme resolved for the model).
    pub fn stepping(&self) -> Stepping {
        self.stepping
    }

    /// Stable name of the method for a result: `ensemble:event` or `ensemble:generation`.
    pub fn method(&self) -> &'static str {
        self.stepping.method()
    }

    /// The known bias of the stepping for a result's warnings (`None` when exact in
    /// distribution).
    pub fn known_bias(&self) -> Option<&'static str> {
        self.stepping.known_bias(self.model.rule())
    }

    /// The 32-byte key of this cell's random streams.
    pub fn key(&self) -> [u8; 32] {
        self.key
    }

    /// Ticks per generation: `N` for death-birth and birth-death (time counts events), 1 for
    /// Wright-Fisher.
    pub fn ticks_per_generation(&self) -> u64 {
        if self.model.rule().counts_events() {
            self.model.total()
        } else {
            1
        }
    }

    /// An empty accumulator for this job.
    pub fn accumulator(&self) -> Accumulator {
        Accumulator::new(
            self.fingerprint,
            self.config.replicates,
            self.model.demes(),
            self.config.arrival_fractions.len(),
            self.ticks_per_generation(),
        )
    }

    /// Checks that `acc` was made by this job (same cell, seed and result-changing settings).
    pub fn check_checkpoint(&self, acc: &Accumulator) -> Result<(), EnsembleError> {
        let fresh = self.accumulator();
        let same = acc.fingerprint == fresh.fingerprint
            && acc.requested == fresh.requested
            && acc.demes == fresh.demes
            && acc.fractions == fresh.fractions
            && acc.ticks_per_generation == fresh.ticks_per_generation
            && acc.arrivals.len() == fresh.arrivals.len()
            && acc.next <= acc.requested;
        if same {
            Ok(())
        } else {
            Err(EnsembleError::ForeignCheckpoint)
        }
    }

    /// Runs replicate `q` alone (sequentially, on the calling thread).
    pub fn replicate(&self, q: u64) -> ReplicateOutcome {
        let mut rep = Replicate::new(&self.tables);
        let mut rng = stream::replicate_rng(&self.key, q);
        rep.run(self.model, &self.tables, &mut rng)
    }

    /// Runs replicates `range` on `pool` and returns their outcomes in index order.
    pub fn run_chunk(&self, range: Range<u64>, pool: &rayon::ThreadPool) -> ChunkOutcome {
        let start = range.start;
        if self.tables.lane_capacity().is_some() {
            return self.run_chunk_in_lanes(range, pool);
        }
        let replicates = pool.install(|| {
            range
                .into_par_iter()
                .map_init(
                    || Replicate::new(&self.tables),
                    |rep, q| {
                        let mut rng = stream::replicate_rng(&self.key, q);
                        rep.run(self.model, &self.tables, &mut rng)
                    },
                )
                .collect()
        });
        ChunkOutcome { start, replicates }
    }

    /// [`Self::run_chunk`] for tables whose replicates run in lanes: blocks of
    /// [`LANE_BLOCK`] replicates, each block's replicates stepped in turn on one thread.
    fn run_chunk_in_lanes(&self, range: Range<u64>, pool: &rayon::ThreadPool) -> ChunkOutcome {
        let start = range.start;
        let blocks = (range.end - range.start).div_ceil(LANE_BLOCK);
        let rng_for = |q: u64| stream::replicate_rng(&self.key, q);
        let per_block: Vec<Vec<ReplicateOutcome>> = pool.install(|| {
            (0..blocks)
                .into_par_iter()
                .map_init(
                    || std::array::from_fn(|_| Replicate::new(&self.tables)),
                    |reps, b| {
                        let lo = start + b * LANE_BLOCK;
                        let hi = (lo + LANE_BLOCK).min(range.end);
                        chain::run_in_lanes(&self.tables, lo..hi, reps, &rng_for)
                    },
                )
                .collect()
        });
        let replicates = per_block.into_iter().flatten().collect();
        ChunkOutcome { start, replicates }
    }
}

/// Replicates per block of the lane runner (see `chain/lanes.rs`).
const LANE_BLOCK: u64 = 32;

/// Runs the ensemble for one start on the given thread pool.
///
/// # Panics
/// If the start deme does not exist or an arrival fraction is outside `(0, 1]` (see
/// [`EnsembleJob::new`] for the fallible form).
pub fn run(
    model: &Model,
    start: Start,
    config: &EnsembleConfig,
    pool: &rayon::ThreadPool,
    observer: &dyn ProgressObserver,
    cancel: &AtomicBool,
) -> EnsembleSummary {
    run_resumable(
        model,
        start,
        config,
        pool,
        observer,
        cancel,
        None,
        &mut |_, _| {},
    )
    .unwrap_or_else(|e| panic!("ensemble::run: {e}"))
}

/// Runs (or resumes from `resume`) the ensemble chunk by chunk: before each chunk it checks
/// `cancel`; after each chunk it merges the outcomes in replicate order, calls `observer`
/// and hands the accumulator and what the chunk added ([`ChunkRecord`], the step to commit
/// as a checkpoint) to `on_chunk`.
#[allow(clippy::too_many_arguments)]
pub fn run_resumable(
    model: &Model,
    start: Start,
    config: &EnsembleConfig,
    pool: &rayon::ThreadPool,
    observer: &dyn ProgressObserver,
    cancel: &AtomicBool,
    resume: Option<Accumulator>,
    on_chunk: &mut dyn FnMut(&Accumulator, &ChunkRecord),
) -> Result<EnsembleSummary, EnsembleError> {
    let job = EnsembleJob::new(model, start, config)?;
    let mut acc = match resume {
        Some(acc) => {
            job.check_checkpoint(&acc)?;
            acc
        }
        None => job.accumulator(),
    };
    let chunk = config.chunk_size.max(1);
    while !acc.is_finished() && !cancel.load(Ordering::Relaxed) {
        let a = acc.next_replicate();
        let b = a.saturating_add(chunk).min(config.replicates);
        let outcome = job.run_chunk(a..b, pool);
        let record = acc.merge_recorded(outcome, config.target_half_width);
        observer.on_progress(acc.next_replicate(), config.replicates);
        on_chunk(&acc, &record);
    }
    Ok(acc.finish())
}
