//! The resumable aggregate of an ensemble: integer counts, integer time sums and the
//! per-replicate time lists, merged chunk by chunk in replicate order.
//!
//! Everything inside is an integer, so merging is exact and the final summary (means and
//! quantiles computed only in [`Accumulator::finish`]) does not depend on how the replicates
//! were split into chunks or threads.
//!
//! A checkpoint is the ordered list of [`ChunkRecord`]s: what each merged chunk added.
//! Storing one record per chunk keeps every commit as small as one chunk's own times (the
//! accumulator itself grows with the whole run), and replaying the records in order on a
//! fresh accumulator ([`Accumulator::apply`]) rebuilds it exactly.

use super::chain::{End, ReplicateOutcome};
use super::{EnsembleSummary, StopReason, TimeQuantiles};
use crate::stats::{fixation_interval, quantile};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Early stopping is judged only when the number of merged replicates is a multiple of this,
/// whatever the chunk size.
pub const EARLY_STOP_GRID: u64 = 1000;

/// The outcomes of replicates `start .. start + replicates.len()`, in index order.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ChunkOutcome {
    /// Index of the first replicate.
    pub start: u64,
    /// One outcome per replicate.
    pub replicates: Vec<ReplicateOutcome>,
}

/// Everything needed to finish or resume an ensemble. Serialise it after every chunk to
/// resume after a crash with bit-identical results.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Accumulator {
    /// Digest of the cell key and every setting that changes results (replicates, limits,
    /// arrival fractions, early-stopping target); a checkpoint only resumes its own job.
    pub(crate) fingerprint: [u8; 32],
    pub(crate) requested: u64,
    pub(crate) demes: usize,
    pub(crate) fractions: usize,
    pub(crate) ticks_per_generation: u64,
    pub(crate) next: u64,
    pub(crate) fixed: u64,
    pub(crate) lost: u64,
    pub(crate) unresolved: u64,
    #[serde(with = "decimal")]
    pub(crate) absorption_ticks: u128,
    #[serde(with = "decimal")]
    pub(crate) fixation_ticks: u128,
    #[serde(with = "decimal")]
    pub(crate) state_changes: u128,
    /// Absorption times of absorbed replicates, in replicate order.
    pub(crate) absorption_times: Vec<u64>,
    /// Fixation times of fixed replicates, in replicate order.
    pub(crate) fixation_times: Vec<u64>,
    /// `arrivals[deme * fractions + f]`: arrival times over fixed replicates.
    pub(crate) arrivals: Vec<Vec<u64>>,
    pub(crate) target_reached: bool,
}

/// What one merged chunk added to an [`Accumulator`]: the count and tick-sum increments and
/// the new times, in replicate order. Only the times the summary uses are kept (arrival times
/// of fixing replicates only), so a record holds a few integers per replicate.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ChunkRecord {
    /// The fingerprint of the accumulator that made it (a record only replays into its own
    /// ensemble).
    fingerprint: [u8; 32],
    /// Index of the first replicate merged.
    pub start: u64,
    /// Replicates merged (those of the chunk kept before any early stop).
    pub replicates: u64,
    fixed: u64,
    lost: u64,
    unresolved: u64,
    #[serde(with = "decimal")]
    absorption_ticks: u128,
    #[serde(with = "decimal")]
    fixation_ticks: u128,
    #[serde(with = "decimal")]
    state_changes: u128,
    absorption_times: Vec<u64>,
    fixation_times: Vec<u64>,
    /// `arrivals[deme * fractions + f]`: the new arrival times.
    arrivals: Vec<Vec<u64>>,
    target_reached: bool,
}

/// Why a [`ChunkRecord`] cannot be applied.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ReplayError {
    /// The record does not start where the accumulator stands.
    #[error("chunk record starts at replicate {record} but the accumulator is at {next}")]
    OutOfOrder {
        /// Where the record starts.
        record: u64,
        /// Where the accumulator stands.
        next: u64,
    },
    /// The record was made by another ensemble (cell, seed or result-changing setting) or is
    /// inconsistent.
    #[error("chunk record does not fit this ensemble")]
    Mismatch,
}

impl Accumulator {
    pub(crate) fn new(
        fingerprint: [u8; 32],
        requested: u64,
        demes: usize,
        fractions: usize,
        ticks_per_generation: u64,
    ) -> Self {
        Self {
            fingerprint,
            requested,
            demes,
            fractions,
            ticks_per_generation,
            next: 0,
            fixed: 0,
            lost: 0,
            unresolved: 0,
            absorption_ticks: 0,
            fixation_ticks: 0,
            state_changes: 0,
            absorption_times: Vec::new(),
            fixation_times: Vec::new(),
            arrivals: vec![Vec::new(); demes * fractions],
            target_reached: false,
        }
    }

    /// Index of the next replicate to run (= replicates merged so far).
    pub fn next_replicate(&self) -> u64 {
        self.next
    }

    /// Whether nothing is left to run: all requested replicates merged, or the target met.
    pub fn is_finished(&self) -> bool {
        self.target_reached || self.next >= self.requested
    }

    /// Total state changes over the merged replicates (a measure of work done).
    pub fn state_changes(&self) -> u128 {
        self.state_changes
    }

    /// `(fixed, lost, unresolved)` so far.
    pub fn counts(&self) -> (u64, u64, u64) {
        (self.fixed, self.lost, self.unresolved)
    }

    /// The reported 95% interval: Wilson lower bound of `fixed / n`, Wilson upper bound of
    /// `(fixed + unresolved) / n`.
    fn interval(&self) -> (f64, f64) {
        fixation_interval(self.fixed, self.unresolved, self.next)
    }

    fn push(&mut self, outcome: ReplicateOutcome) {
        self.next += 1;
        self.state_changes += u128::from(outcome.state_changes);
        match outcome.end {
            End::Fixed => {
                self.fixed += 1;
                self.fixation_ticks += u128::from(outcome.time);
                self.absorption_ticks += u128::from(outcome.time);
                self.fixation_times.push(outcome.time);
                self.absorption_times.push(outcome.time);
                for (list, t) in self.arrivals.iter_mut().zip(outcome.arrivals) {
                    list.push(t);
                }
            }
            End::Lost => {
                self.lost += 1;
                self.absorption_ticks += u128::from(outcome.time);
                self.absorption_times.push(outcome.time);
            }
            End::Unresolved => self.unresolved += 1,
        }
    }

    /// Merges a chunk that starts at [`Self::next_replicate`], replicate by replicate. With a
    /// target half-width, the criterion is judged at every multiple of [`EARLY_STOP_GRID`];
    /// once it holds, the rest of the chunk is dropped. Returns whether the target was met.
    ///
    /// # Panics
    /// If the chunk does not start at the next replicate.
    pub fn merge(&mut self, chunk: ChunkOutcome, target_half_width: Option<f64>) -> bool {
        assert_eq!(
            chunk.start, self.next,
            "chunks must be merged in replicate order"
        );
        for outcome in chunk.replicates {
            if self.is_finished() {
                break;
            }
            self.push(outcome);
            if let Some(h) = target_half_width {
                if self.next.is_multiple_of(EARLY_STOP_GRID) {
                    let (lo, hi) = self.interval();
                    if (hi - lo) / 2.0 <= h {
                        self.target_reached = true;
                    }
                }
            }
        }
        self.target_reached
    }

    /// [`Self::merge`], returning what the chunk added (to be stored as a checkpoint step).
    ///
    /// # Panics
    /// If the chunk does not start at the next replicate.
    pub fn merge_recorded(
        &mut self,
        chunk: ChunkOutcome,
        target_half_width: Option<f64>,
    ) -> ChunkRecord {
        let before = self.clone_counts();
        let marks = (
            self.absorption_times.len(),
            self.fixation_times.len(),
            self.arrivals.iter().map(Vec::len).collect::<Vec<_>>(),
        );
        self.merge(chunk, target_half_width);
        ChunkRecord {
            fingerprint: self.fingerprint,
            start: before.next,
            replicates: self.next - before.next,
            fixed: self.fixed - before.fixed,
            lost: self.lost - before.lost,
            unresolved: self.unresolved - before.unresolved,
            absorption_ticks: self.absorption_ticks - before.absorption_ticks,
            fixation_ticks: self.fixation_ticks - before.fixation_ticks,
            state_changes: self.state_changes - before.state_changes,
            absorption_times: self.absorption_times[marks.0..].to_vec(),
            fixation_times: self.fixation_times[marks.1..].to_vec(),
            arrivals: self
                .arrivals
                .iter()
                .zip(&marks.2)
                .map(|(list, &from)| list[from..].to_vec())
                .collect(),
            target_reached: self.target_reached,
        }
    }

    /// Adds a stored [`ChunkRecord`]; replaying a run's records in order on a fresh
    /// accumulator gives exactly the accumulator that made them. Nothing changes on error.
    pub fn apply(&mut self, record: &ChunkRecord) -> Result<(), ReplayError> {
        if record.start != self.next {
            return Err(ReplayError::OutOfOrder {
                record: record.start,
                next: self.next,
            });
        }
        let consistent = record.fingerprint == self.fingerprint
            && record.arrivals.len() == self.arrivals.len()
            && record.fixed + record.lost + record.unresolved == record.replicates
            && record.fixation_times.len() as u64 == record.fixed
            && record.absorption_times.len() as u64 == record.fixed + record.lost
            && record
                .arrivals
                .iter()
                .all(|list| list.len() as u64 == record.fixed)
            && self
                .next
                .checked_add(record.replicates)
                .is_some_and(|n| n <= self.requested);
        if !consistent {
            return Err(ReplayError::Mismatch);
        }
        self.next += record.replicates;
        self.fixed += record.fixed;
        self.lost += record.lost;
        self.unresolved += record.unresolved;
        self.absorption_ticks += record.absorption_ticks;
        self.fixation_ticks += record.fixation_ticks;
        self.state_changes += record.state_changes;
        self.absorption_times
            .extend_from_slice(&record.absorption_times);
        self.fixation_times
            .extend_from_slice(&record.fixation_times);
        for (list, new) in self.arrivals.iter_mut().zip(&record.arrivals) {
            list.extend_from_slice(new);
        }
        self.target_reached = record.target_reached;
        Ok(())
    }

    /// The integer counters alone (the time lists left empty).
    fn clone_counts(&self) -> Self {
        Self {
            absorption_times: Vec::new(),
            fixation_times: Vec::new(),
            arrivals: Vec::new(),
            ..*self
        }
    }

    /// The summary of the replicates merged so far.
    pub fn finish(&self) -> EnsembleSummary {
        let n = self.next;
        let g = self.ticks_per_generation as f64;
        let absorbed = self.fixed + self.lost;
        let mean = |sum: u128, count: u64| (count > 0).then(|| sum as f64 / count as f64 / g);
        let quantiles = |times: &[u64]| -> Option<TimeQuantiles> {
            if times.is_empty() {
                return None;
            }
            let mut sorted = times.to_vec();
            sorted.sort_unstable();
            let x: Vec<f64> = sorted.into_iter().map(|t| t as f64 / g).collect();
            Some(TimeQuantiles {
                q05: quantile(&x, 0.05),
                median: quantile(&x, 0.5),
                q95: quantile(&x, 0.95),
            })
        };
        let arrival = (0..self.demes)
            .map(|i| {
                (0..self.fractions)
                    .filter_map(|f| {
                        quantiles(&self.arrivals[i * self.fractions + f]).map(|q| (f, q))
                    })
                    .collect::<BTreeMap<_, _>>()
            })
            .collect();
        let stop = if self.target_reached {
            StopReason::TargetReached
        } else if self.next >= self.requested {
            StopReason::Completed
        } else {
            StopReason::Cancelled
        };
        EnsembleSummary {
            replicates: n,
            fixed: self.fixed,
            lost: self.lost,
            unresolved: self.unresolved,
            fixation_probability: if n > 0 {
                self.fixed as f64 / n as f64
            } else {
                0.0
            },
            ci95: self.interval(),
            mean_absorption_generations: mean(self.absorption_ticks, absorbed),
            mean_fixation_generations: mean(self.fixation_ticks, self.fixed),
            fixation_quantiles: quantiles(&self.fixation_times),
            absorption_quantiles: quantiles(&self.absorption_times),
            arrival,
            stop,
        }
    }
}

/// `u128` as a decimal string (JSON numbers above 2^53 are not portable).
mod decimal {
    use serde::{de::Error, Deserialize, Deserializer, Serializer};

    pub(super) fn serialize<S: Serializer>(v: &u128, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&v.to_string())
    }

    pub(super) fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<u128, D::Error> {
        let text = String::deserialize(d)?;
        text.parse().map_err(D::Error::custom)
    }
}
