//! Paired (common-random-number) ensembles: a baseline and a scenario model run replicate
//! `q` from the same random stream, so their difference is estimated from pairs.
//!
//! The key of a cell's streams ([`super::stream::cell_key`]) hashes the seed, the fitness, the
//! start, the rule and the scope, never the matrix: two models that differ only in their
//! kernel draw replicate `q` from the same stream. Where the two chains make the same moves
//! they consume the same random numbers, so their trajectories stay together until the
//! changed entries matter; a scenario that changes nothing gives outcomes identical to the
//! baseline's, and every difference below is then exactly 0. [`EnsembleJob`]s of the two
//! models are checked to share their key ([`PairedError::Unpaired`]).
//!
//! This module owns the per-replicate outcome lists of a job ([`outcomes`], run chunk by chunk
//! on the caller's pool and kept in replicate order, so they do not depend on the number of
//! threads) and their paired summary ([`compare`]):
//!
//! * the table of (baseline end, scenario end) over the replicates;
//! * the change of the fixation probability, `(fixed_scenario - fixed_baseline) / n`, with
//!   Newcombe's (1998) hybrid score interval for the difference of paired proportions
//!   ([`newcombe_paired`]), widened for unresolved replicates as the single-ensemble interval is
//!   (the lower end counts the scenario's unresolved replicates as lost and the baseline's as
//!   fixed, the upper end the reverse);
//! * the change of the mean fixation time (each mean over its own fixing replicates) and of
//!   the mean first-arrival time per deme and arrival fraction, with a normal 95% interval
//!   whose variance `Var(a)/n_a + Var(b)/n_b - 2 n_ab Cov(a, b)/(n_a n_b)` counts the pairs that
//!   fixed in both (the delta method for a difference of two overlapping means, common
//!   practice); and the change of the median arrival time (no interval).

use super::chain::{End, ReplicateOutcome};
use super::{EnsembleConfig, EnsembleError, EnsembleJob};
use crate::model::Model;
use crate::start::Start;
use crate::stats::{fixation_interval, quantile, wilson, Z95};
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};

/// Why a paired ensemble cannot run.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PairedError {
    /// One of the ensembles refused its settings.
    #[error("ensemble: {0}")]
    Ensemble(#[from] EnsembleError),
    /// The two models differ in more than their kernel (sizes, rule, scope or fitness), so
    /// their replicates would not share streams.
    #[error("the paired models draw from different streams (they differ in more than the kernel)")]
    Unpaired,
    /// The cancellation flag was raised.
    #[error("the paired ensemble was cancelled")]
    Cancelled,
}

/// The outcomes of replicates `0 .. config.replicates` of `job`, in replicate order, run chunk
/// by chunk on `pool` (`config.chunk_size` at a time; early stopping does not apply). `None`
/// when `cancel` was raised before the last chunk.
pub fn outcomes(
    job: &EnsembleJob<'_>,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
) -> Option<Vec<ReplicateOutcome>> {
    let total = job.config.replicates;
    let chunk = job.config.chunk_size.max(1);
    let mut out = Vec::with_capacity(usize::try_from(total).unwrap_or(0).min(1 << 24));
    let mut next = 0;
    while next < total {
        if cancel.load(Ordering::Relaxed) {
            return None;
        }
        let end = next.saturating_add(chunk).min(total);
        out.extend(job.run_chunk(next..end, pool).replicates);
        next = end;
    }
    Some(out)
}

/// Builds the jobs of two models that must share their streams.
pub fn paired_jobs<'a>(
    baseline: &'a Model,
    scenario: &'a Model,
    start: Start,
    config: &EnsembleConfig,
) -> Result<(EnsembleJob<'a>, EnsembleJob<'a>), PairedError> {
    let a = EnsembleJob::new(baseline, start, config)?;
    let b = EnsembleJob::new(scenario, start, config)?;
    let same_chain = baseline.sizes() == scenario.sizes()
        && baseline.rule() == scenario.rule()
        && baseline.scope() == scenario.scope()
        && baseline.fitness().to_bits() == scenario.fitness().to_bits();
    if a.key() != b.key() || !same_chain {
        return Err(PairedError::Unpaired);
    }
    Ok((a, b))
}

/// Runs the baseline and the scenario ensembles of one start from the same streams and
/// summarises the pairs ([`compare`]).
pub fn run_paired(
    baseline: &Model,
    scenario: &Model,
    start: Start,
    config: &EnsembleConfig,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
) -> Result<PairedSummary, PairedError> {
    let (a, b) = paired_jobs(baseline, scenario, start, config)?;
    let base = outcomes(&a, pool, cancel).ok_or(PairedError::Cancelled)?;
    let scen = outcomes(&b, pool, cancel).ok_or(PairedError::Cancelled)?;
    Ok(compare(
        &base,
        &scen,
        a.ticks_per_generation(),
        baseline.demes(),
        config.arrival_fractions.len(),
    ))
}

/// A mean of each member of a pair and its change, in generations.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MeanChange {
    /// Baseline mean.
    pub baseline: f64,
    /// Scenario mean.
    pub scenario: f64,
    /// `scenario - baseline`.
    pub change: f64,
    /// Normal 95% interval of the change (module docs); `None` with fewer than two values on
    /// either side.
    pub ci95: Option<(f64, f64)>,
}

/// The change of one deme's first-arrival time at one arrival fraction, among fixing
/// replicates, in generations.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ArrivalChange {
    /// Change of the mean arrival time, with its interval.
    pub mean: MeanChange,
    /// Median arrival time of the baseline.
    pub baseline_median: f64,
    /// Median arrival time of the scenario.
    pub scenario_median: f64,
}

/// How a replicate ended, as an index into [`PairedSummary::table`].
fn end_index(end: End) -> usize {
    match end {
        End::Fixed => 0,
        End::Lost => 1,
        End::Unresolved => 2,
    }
}

/// The paired summary of a baseline and a scenario ensemble.
#[derive(Debug, Clone, PartialEq)]
pub struct PairedSummary {
    /// Pairs compared.
    pub replicates: u64,
    /// `table[b][s]`: pairs whose baseline ended `b` and scenario ended `s`, indices 0 fixed,
    /// 1 lost, 2 unresolved.
    pub table: [[u64; 3]; 3],
    /// Baseline `fixed / replicates`.
    pub baseline_fixation_probability: f64,
    /// Scenario `fixed / replicates`.
    pub scenario_fixation_probability: f64,
    /// `scenario - baseline`.
    pub change_fixation_probability: f64,
    /// 95% interval of the change (Newcombe 1998, widened for unresolved replicates).
    pub ci95: (f64, f64),
    /// Baseline Wilson 95% interval (widened for unresolved replicates, as a single ensemble).
    pub baseline_ci95: (f64, f64),
    /// Scenario Wilson 95% interval.
    pub scenario_ci95: (f64, f64),
    /// Change of the mean fixation time, when both sides fixed at least once.
    pub fixation_time: Option<MeanChange>,
    /// `arrival[deme]`: arrival-fraction index to the change of the arrival time, for the
    /// fractions with arrivals on both sides.
    pub arrival: Vec<BTreeMap<usize, ArrivalChange>>,
}

impl PairedSummary {
    /// `(fixed, unresolved)` of the baseline and of the scenario.
    pub fn counts(&self) -> ((u64, u64), (u64, u64)) {
        margins(&self.table)
    }
}

/// `((fixed, unresolved) of the baseline, (fixed, unresolved) of the scenario)`.
fn margins(t: &[[u64; 3]; 3]) -> ((u64, u64), (u64, u64)) {
    let base = (t[0].iter().sum(), t[2].iter().sum());
    let scen = ((0..3).map(|b| t[b][0]).sum(), (0..3).map(|b| t[b][2]).sum());
    (base, scen)
}

/// Newcombe's hybrid score 95%-type interval (at normal quantile `z`) for `p_2 - p_1`, the
/// difference of two paired proportions, from the pair table `t[x1][x2]` with index 1 =
/// success: `p_1 = (t[1][0] + t[1][1]) / n`, `p_2 = (t[0][1] + t[1][1]) / n`.
///
/// Newcombe R.G. (1998) "Improved confidence intervals for the difference between binomial
/// proportions based on paired data", Stat. Med. 17:2635-2650, method 10 (from memory, with
/// the formula as restated in secondary sources citing the paper): Wilson intervals
/// `(l_i, u_i)` of each margin and the correlation `φ` of the table, with `φ`'s numerator
/// `ad - bc` reduced by `n/2` when it exceeds `n/2` and set to 0 between 0 and `n/2`;
/// `lower = D - sqrt((p_2 - l_2)^2 - 2φ (p_2 - l_2)(u_1 - p_1) + (u_1 - p_1)^2)`,
/// `upper = D + sqrt((u_2 - p_2)^2 - 2φ (u_2 - p_2)(p_1 - l_1) + (p_1 - l_1)^2)`.
/// With no trials the result is `(-1, 1)`.
pub fn newcombe_paired(t: [[u64; 2]; 2], z: f64) -> (f64, f64) {
    let n = t[0][0] + t[0][1] + t[1][0] + t[1][1];
    if n == 0 {
        return (-1.0, 1.0);
    }
    let nf = n as f64;
    let x1 = t[1][0] + t[1][1];
    let x2 = t[0][1] + t[1][1];
    let (p1, p2) = (x1 as f64 / nf, x2 as f64 / nf);
    let (l1, u1) = wilson(x1, n, z);
    let (l2, u2) = wilson(x2, n, z);
    // Rows and columns of the table as 2x2 [[a, b], [c, d]] with a = both successes.
    let (a, b, c, d) = (
        t[1][1] as f64,
        t[1][0] as f64,
        t[0][1] as f64,
        t[0][0] as f64,
    );
    let margins = (a + b) * (c + d) * (a + c) * (b + d);
    let cross = a * d - b * c;
    let numerator = if cross > nf / 2.0 {
        cross - nf / 2.0
    } else if cross < 0.0 {
        cross
    } else {
        0.0
    };
    let phi = if margins > 0.0 {
        numerator / margins.sqrt()
    } else {
        0.0
    };
    let diff = p2 - p1;
    let down = ((p2 - l2).powi(2) - 2.0 * phi * (p2 - l2) * (u1 - p1) + (u1 - p1).powi(2))
        .max(0.0)
        .sqrt();
    let up = ((u2 - p2).powi(2) - 2.0 * phi * (u2 - p2) * (p1 - l1) + (p1 - l1).powi(2))
        .max(0.0)
        .sqrt();
    ((diff - down).max(-1.0), (diff + up).min(1.0))
}

/// Integer sums of one paired time (first arrival or fixation), in ticks.
#[derive(Debug, Default)]
struct PairedTimes {
    n_base: u64,
    sum_base: u128,
    sq_base: u128,
    n_scen: u64,
    sum_scen: u128,
    sq_scen: u128,
    /// Over the pairs where both sides have a time.
    n_both: u64,
    both_base: u128,
    both_scen: u128,
    both_cross: u128,
}

impl PairedTimes {
    fn push(&mut self, base: Option<u64>, scen: Option<u64>) {
        if let Some(x) = base {
            self.n_base += 1;
            self.sum_base += u128::from(x);
            self.sq_base += u128::from(x) * u128::from(x);
        }
        if let Some(y) = scen {
            self.n_scen += 1;
            self.sum_scen += u128::from(y);
            self.sq_scen += u128::from(y) * u128::from(y);
        }
        if let (Some(x), Some(y)) = (base, scen) {
            self.n_both += 1;
            self.both_base += u128::from(x);
            self.both_scen += u128::from(y);
            self.both_cross += u128::from(x) * u128::from(y);
        }
    }

    /// The means, their change and its normal interval, in generations of `g` ticks.
    fn change(&self, g: f64) -> Option<MeanChange> {
        if self.n_base == 0 || self.n_scen == 0 {
            return None;
        }
        let (na, nb) = (self.n_base as f64, self.n_scen as f64);
        let mean_a = self.sum_base as f64 / na / g;
        let mean_b = self.sum_scen as f64 / nb / g;
        let change = mean_b - mean_a;
        let variance = |sq: u128, sum: u128, n: f64| {
            let s = sum as f64;
            ((sq as f64 - s * s / n) / (n - 1.0)).max(0.0)
        };
        let ci95 = (self.n_base >= 2 && self.n_scen >= 2).then(|| {
            let var_a = variance(self.sq_base, self.sum_base, na);
            let var_b = variance(self.sq_scen, self.sum_scen, nb);
            let nab = self.n_both as f64;
            let cov = if self.n_both >= 2 {
                (self.both_cross as f64 - self.both_base as f64 * self.both_scen as f64 / nab)
                    / (nab - 1.0)
            } else {
                0.0
            };
            let var = (var_a / na + var_b / nb - 2.0 * nab * cov / (na * nb)).max(0.0);
            let half = Z95 * var.sqrt() / g;
            (change - half, change + half)
        });
        Some(MeanChange {
            baseline: mean_a,
            scenario: mean_b,
            change,
            ci95,
        })
    }
}

fn median(mut ticks: Vec<u64>, g: f64) -> f64 {
    ticks.sort_unstable();
    let x: Vec<f64> = ticks.into_iter().map(|t| t as f64 / g).collect();
    quantile(&x, 0.5)
}

/// Pairs replicate `q` of `baseline` with replicate `q` of `scenario` (same length, same
/// start and settings) and summarises the pairs (module docs). `fractions` is the number of
/// arrival fractions the outcomes record per deme.
///
/// # Panics
/// If the two lists differ in length.
pub fn compare(
    baseline: &[ReplicateOutcome],
    scenario: &[ReplicateOutcome],
    ticks_per_generation: u64,
    demes: usize,
    fractions: usize,
) -> PairedSummary {
    assert_eq!(
        baseline.len(),
        scenario.len(),
        "paired ensembles must have the same replicates"
    );
    let g = ticks_per_generation as f64;
    let mut table = [[0u64; 3]; 3];
    let mut fixation = PairedTimes::default();
    let slots = demes * fractions;
    let mut arrivals: Vec<PairedTimes> = (0..slots).map(|_| PairedTimes::default()).collect();
    let mut lists: Vec<(Vec<u64>, Vec<u64>)> = vec![(Vec::new(), Vec::new()); slots];
    for (a, b) in baseline.iter().zip(scenario) {
        table[end_index(a.end)][end_index(b.end)] += 1;
        let fixed_time = |o: &ReplicateOutcome| (o.end == End::Fixed).then_some(o.time);
        fixation.push(fixed_time(a), fixed_time(b));
        let arrival = |o: &ReplicateOutcome, slot: usize| o.arrivals.get(slot).copied();
        for slot in 0..slots {
            let (x, y) = (arrival(a, slot), arrival(b, slot));
            arrivals[slot].push(x, y);
            lists[slot].0.extend(x);
            lists[slot].1.extend(y);
        }
    }
    let n = baseline.len() as u64;
    let ((base_fixed, base_unresolved), (scen_fixed, scen_unresolved)) = margins(&table);
    let p = |x: u64| if n > 0 { x as f64 / n as f64 } else { 0.0 };
    // The 2x2 tables with unresolved replicates settled both ways (index 1 = fixed).
    let settle = |base_unresolved_fixed: bool, scen_unresolved_fixed: bool| {
        let mut t2 = [[0u64; 2]; 2];
        for (b, row) in table.iter().enumerate() {
            for (s, &count) in row.iter().enumerate() {
                let fixed = |index: usize, unresolved_fixed: bool| match index {
                    0 => 1,
                    1 => 0,
                    _ => usize::from(unresolved_fixed),
                };
                t2[fixed(b, base_unresolved_fixed)][fixed(s, scen_unresolved_fixed)] += count;
            }
        }
        t2
    };
    let lower = newcombe_paired(settle(true, false), Z95).0;
    let upper = newcombe_paired(settle(false, true), Z95).1;
    let interval = |fixed: u64, unresolved: u64| fixation_interval(fixed, unresolved, n);
    let arrival = (0..demes)
        .map(|deme| {
            (0..fractions)
                .filter_map(|f| {
                    let slot = deme * fractions + f;
                    let mean = arrivals[slot].change(g)?;
                    let (a, b) = std::mem::take(&mut lists[slot]);
                    Some((
                        f,
                        ArrivalChange {
                            mean,
                            baseline_median: median(a, g),
                            scenario_median: median(b, g),
                        },
                    ))
                })
                .collect()
        })
        .collect();
    PairedSummary {
        replicates: n,
        table,
        baseline_fixation_probability: p(base_fixed),
        scenario_fixation_probability: p(scen_fixed),
        change_fixation_probability: p(scen_fixed) - p(base_fixed),
        ci95: (lower, upper),
        baseline_ci95: interval(base_fixed, base_unresolved),
        scenario_ci95: interval(scen_fixed, scen_unresolved),
        fixation_time: fixation.change(g),
        arrival,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn newcombe_interval_contains_the_difference_and_stays_in_range() {
        for t in [
            [[22, 0], [5, 14]],
            [[20, 5], [15, 10]],
            [[0, 0], [0, 7]],
            [[9, 0], [0, 0]],
            [[0, 3], [0, 0]],
        ] {
            let n: u64 = t.iter().flatten().sum();
            let d = (t[0][1] as f64 - t[1][0] as f64) / n as f64;
            let (lo, hi) = newcombe_paired(t, Z95);
            assert!(
                lo <= d && d <= hi && lo >= -1.0 && hi <= 1.0,
                "{t:?}: {lo} {d} {hi}"
            );
        }
    }

    #[test]
    fn swapping_the_members_mirrors_the_interval() {
        let t = [[20, 5], [15, 10]];
        let swapped = [[20, 15], [5, 10]];
        let (lo, hi) = newcombe_paired(t, Z95);
        let (lo2, hi2) = newcombe_paired(swapped, Z95);
        assert!((lo + hi2).abs() < 1e-15 && (hi + lo2).abs() < 1e-15);
    }

    fn outcome(end: End, time: u64, arrivals: Vec<u64>) -> ReplicateOutcome {
        ReplicateOutcome {
            end,
            time,
            state_changes: 1,
            arrivals,
        }
    }

    #[test]
    fn identical_outcomes_give_exactly_zero_changes() {
        let list = vec![
            outcome(End::Fixed, 100, vec![10, 40]),
            outcome(End::Lost, 3, vec![]),
            outcome(End::Fixed, 130, vec![12, 70]),
            outcome(End::Fixed, 90, vec![8, 30]),
        ];
        let s = compare(&list, &list, 10, 2, 1);
        assert_eq!(s.change_fixation_probability, 0.0);
        let t = s.fixation_time.unwrap();
        assert_eq!(t.change, 0.0);
        assert_eq!(s.arrival[1][&0].mean.change, 0.0);
        assert_eq!(s.arrival[1][&0].baseline_median, 4.0);
    }

    #[test]
    fn unresolved_replicates_widen_the_interval() {
        let base = vec![outcome(End::Lost, 1, vec![]); 50];
        let mut scen = base.clone();
        let plain = compare(&base, &scen, 1, 1, 0).ci95;
        scen[0] = outcome(End::Unresolved, 9, vec![]);
        let wide = compare(&base, &scen, 1, 1, 0).ci95;
        assert_eq!(plain.0, wide.0);
        assert!(wide.1 > plain.1);
    }
}
