//! The generation scheme of death-birth and birth-death: whole generations leaped in demes
//! holding many of both types, event by event everywhere else.
//!
//! A generation is `N` events. Over one generation with the rates held fixed, deme `i`
//! gains `G_i` and loses `L_i` variants, where the expected numbers are the rule's per-event
//! probabilities times `N`:
//!
//! * death-birth: `E G_i = (n_i - k_i) p_i`, `E L_i = k_i q_i`;
//! * birth-death: `E G_l = (N / W) sum_j r k_j F[j][l] (n_l - k_l) / n_l`,
//!   `E L_l = (N / W) sum_j (n_j - k_j) F[j][l] k_l / n_l`.
//!
//! Each event changes at most one deme by one, so the change `G_i - L_i` has the
//! per-generation mean `E G_i - E L_i` and variance `E G_i + E L_i` of the rule's own
//! diffusion. A leaped deme draws `G_i` and `L_i` from Poisson distributions (counts of rare
//! events among `N`; Poisson leaping, Gillespie D.T. (2001) J. Chem. Phys. 115:1716-1733,
//! from memory) and its count becomes `k_i + G_i - L_i` clamped to `[0, n_i]`. The rates are
//! taken at the estimated midpoint of the generation (the same paper's estimated-midpoint
//! variant, from memory): every deme's count moved by half its expected change, rounded.
//! That makes the mean change right to second order in the per-generation change (a deme
//! growing by a factor `1 + s` per generation under held rates grows by `1 + s + s^2/2`,
//! as `e^s` does) and feeds other demes' growth into a deme's sources within the generation.
//!
//! The other demes (few variants or few residents: new arrivals, the last residents, every
//! small deme) run event by event through the same generation's `N` events from their
//! counts at its start, with the leaped demes as sources held at their midpoint counts; the
//! leaped demes take their new counts at the generation's end. Birth-death holds `W` at its
//! midpoint value for the generation (it moves by at most the generation's changes out of
//! `N`). A leaped generation that would pass the tick limit ends the replicate as
//! unresolved at the limit.
//!
//! The switch rule (named constants, reasons beside them):
//!
//! * the event chain hands over once a state change leaves its deme with at least
//!   [`LEAP_FROM_COPIES`] variants and as many residents;
//! * in a leaped generation a deme is leaped if it holds at least [`LEAP_WHILE_COPIES`] of
//!   each type, or if it expects at least [`LEAP_FROM_CHANGES`] changes in the generation
//!   (its change is then the sum of many arrivals);
//! * a generation in which no deme qualifies is not leaped: the replicate goes back to the
//!   event chain (so a population without large polymorphic demes is never leaped, and the
//!   variant's establishment, the last residents' loss and every small deme run exactly).
//!
//! Every draw comes from the replicate's own stream in a fixed order (leaped demes in deme
//! order, then the events of the others), so results stay bit-identical for any thread
//! count and chunking.
//!
//! # Measured error
//!
//! Against the event scheme where both run, with
//! `cargo run --release -p demefix-science --example ensemble_scale -- compare 20000`
//! (2026-12-02; 20,000 replicates per row and scheme from a uniform start, the same seed
//! for both schemes, so a replicate's two runs share their stream until the first handover;
//! demes of 10^3 to 10^4 with the example's sparse asymmetric flows; `ret` = share of a
//! deme's recruitment, or dispersal, kept at home; times in generations, ± one standard
//! error; the last column is the mean change of the fixation time over the replicates that
//! fixed under both schemes):
//!
//! | rule | demes (sizes) | ret | s | rho event | rho generation | time event | time generation | paired change |
//! |---|---|---|---|---|---|---|---|---|
//! | death-birth | 2 (2,512-5,012) | 0.99 | 0.05 | 0.0463 ± 0.0015 | 0.0463 | 266.9 ± 1.3 | 266.7 ± 1.3 | -0.07% ± 0.48% |
//! | birth-death | 2 (2,512-5,012) | 0.99 | 0.05 | 0.0457 ± 0.0015 | 0.0457 | 267.8 ± 1.3 | 267.0 ± 1.3 | -0.31% ± 0.49% |
//! | death-birth | 5 (1,000-10,000) | 0.98 | 0.02 | 0.0175 ± 0.0009 | 0.0175 | 665.3 ± 5.5 | 667.9 ± 5.4 | +0.38% ± 0.79% |
//! | birth-death | 5 (1,000-10,000) | 0.98 | 0.02 | 0.0184 ± 0.0009 | 0.0184 | 672.6 ± 5.0 | 674.1 ± 4.7 | +0.21% ± 0.72% |
//! | death-birth | 5 (1,000-10,000) | 0.9 | 0.05 | 0.0362 ± 0.0013 | 0.0362 | 304.3 ± 1.5 | 306.2 ± 1.6 | +0.64% ± 0.48% |
//! | birth-death | 5 (1,000-10,000) | 0.9 | 0.05 | 0.0384 ± 0.0014 | 0.0384 | 317.6 ± 1.4 | 317.1 ± 1.4 | -0.17% ± 0.46% |
//! | death-birth | 4 (1,995-5,012) | 0.5 | 0.02 | 0.0160 ± 0.0009 | 0.0160 | 610.6 ± 5.3 | 616.2 ± 5.2 | +0.92% ± 0.84% |
//! | birth-death | 4 (1,995-5,012) | 0.5 | 0.02 | 0.0213 ± 0.0010 | 0.0213 | 632.2 ± 4.5 | 629.7 ± 4.6 | -0.40% ± 0.73% |
//! | death-birth | 8 (1,000-5,012) | 0.95 | 0.01 | 0.0089 ± 0.0007 | 0.0089 | 1170.7 ± 14.6 | 1182.5 ± 14.3 | +1.01% ± 1.20% |
//! | birth-death | 8 (1,000-5,012) | 0.95 | 0.01 | 0.0086 ± 0.0007 | 0.0086 | 1196.5 ± 15.2 | 1208.1 ± 14.8 | +0.98% ± 1.49% |
//! | death-birth | 3 (1,995-3,981) | 0.95 | 0.002 | 0.001858 ± 0.000068 | 0.001863 | 3315.9 ± 37.0 | 3319.9 ± 37.2 | -0.00% ± 1.42% |
//! | birth-death | 3 (1,995-3,981) | 0.95 | 0.002 | 0.001928 ± 0.000069 | 0.001910 | 3408.4 ± 36.2 | 3368.6 ± 37.5 | -1.03% ± 1.37% |
//!
//! The rows at `s = 0.002` ran 400,000 replicates (`... -- compare 400000 6`). With
//! `s >= 0.01` every replicate's fate was decided before its first handover (no replicate
//! changed fate between the schemes); at `s = 0.002` 30 (death-birth) and 23 (birth-death) of
//! the 400,000 replicates changed fate, moving the fixation probability by +0.3% ± 0.7% and
//! -0.9% ± 0.6% of its value. The changes of the mean fixation time lie between -1.0% and
//! +1.0%, none beyond 1.4 standard errors; death-birth leans to slightly
//! longer times (+0.4% to +1.0%). With the sources held at their start counts instead of
//! their midpoint counts (first-order leaping) the same death-birth rows came out at +0.8%,
//! +1.1% and +1.6%.
//!
//! Against exact values in one well-mixed deme (both rules are the Moran process there;
//! exact fixation probability and conditional fixation time from references.md §1.2), with
//! `cargo run --release -p demefix-science --example ensemble_scale -- moran 20000`:
//!
//! | rule | N | s | rho exact | rho generation | time exact | time generation |
//! |---|---|---|---|---|---|---|
//! | death-birth | 20,000 | 0.05 | 0.04762 | 0.04735 ± 0.00151 | 304.84 | +0.45% ± 0.40% |
//! | birth-death | 20,000 | 0.05 | 0.04762 | 0.04880 ± 0.00151 | 304.84 | -0.29% ± 0.40% |
//! | death-birth | 100,000 | 0.02 | 0.01961 | 0.02090 ± 0.00098 | 823.94 | +0.95% ± 0.56% |
//! | birth-death | 100,000 | 0.02 | 0.01961 | 0.02000 ± 0.00098 | 823.94 | +0.23% ± 0.59% |
//! | death-birth | 100,000 | 0.05 | 0.04762 | 0.04760 ± 0.00151 | 370.86 | +0.26% ± 0.33% |
//! | birth-death | 100,000 | 0.05 | 0.04762 | 0.04795 ± 0.00151 | 370.86 | -0.12% ± 0.33% |
//! | death-birth | 1,000,000 | 0.1 | 0.09091 | 0.09025 ± 0.00203 | 251.89 | -0.00% ± 0.19% |
//! | birth-death | 1,000,000 | 0.1 | 0.09091 | 0.09150 ± 0.00203 | 251.89 | +0.05% ± 0.18% |
//!
//! The tests in `tests/ensemble_scheme.rs` check a two-deme case against the event scheme
//! (1% plus 4.5 standard errors) and one deme of 10^8 against the large-population limits,
//! in seconds.

use super::{
    as_f64, draw_wait, rates, target_sums, End, Replicate, Status, Tables, BD, DB_DEME,
    DB_NEIGHBOURHOOD,
};
use crate::ensemble::tree::SumTree;
use rand::Rng;
use rand_distr::{Distribution, Poisson};

/// The event chain hands over to leaping once a deme holds this many variants and this many
/// residents. Reason: a leap holds a deme's rates for a generation while its count moves by
/// about `sqrt(2 k)`; at `k = 1,000` that is 4.5% of the count. Establishment of a variant
/// (decided at about `1 / s` copies) has long been decided at this count for `s >= 0.01`.
pub const LEAP_FROM_COPIES: u64 = 1000;

/// A leaped deme stays leaped while it holds at least this many of each type (half of
/// [`LEAP_FROM_COPIES`], so that a deme near the threshold does not switch schemes every
/// generation; the count then moves by at most about 6% per generation).
pub const LEAP_WHILE_COPIES: u64 = 500;

/// A deme expecting at least this many changes in a generation is leaped whatever its
/// counts: its change is then dominated by many arrivals, for which the Poisson count is
/// exact given the sources, and running them one by one would cost as much as the event
/// scheme.
pub const LEAP_FROM_CHANGES: f64 = 2000.0;

/// Scratch of the generation scheme, one per replicate (every field is rewritten by each
/// leaped generation).
#[derive(Debug, Clone, Default)]
pub(crate) struct LeapWork {
    /// Source values `(a_j, c_j)` of the current counts (leaped demes: start of generation).
    a: Vec<f64>,
    c: Vec<f64>,
    /// Whether deme `i` is leaped this generation; its counts at the generation's start, at
    /// its estimated midpoint and (leaped demes) at its end.
    leaped: Vec<bool>,
    start_k: Vec<u64>,
    mid_k: Vec<u64>,
    next_k: Vec<u64>,
    /// Rates of the demes run event by event (leaf `2 i` up, `2 i + 1` down; 0 for leaped
    /// demes).
    tree: SumTree,
}

impl LeapWork {
    pub(crate) fn new(m: usize) -> Self {
        Self {
            a: vec![0.0; m],
            c: vec![0.0; m],
            leaped: vec![false; m],
            start_k: vec![0; m],
            mid_k: vec![0; m],
            next_k: vec![0; m],
            tree: SumTree::new(2 * m),
        }
    }
}

/// A Poisson variate of mean `mean >= 0` (0 without a draw when the mean is 0).
fn poisson<R: Rng>(rng: &mut R, mean: f64) -> u64 {
    if mean > 0.0 {
        let draw: f64 = Poisson::new(mean)
            .expect("finite positive mean")
            .sample(rng);
        draw as u64
    } else {
        0
    }
}

/// Whether a state change that left `k` variants in a deme of `n` hands the replicate over
/// to leaping (never for the event scheme, whose threshold is `u64::MAX`).
#[inline(always)]
pub(crate) fn hands_over(k: u64, n: u64, from: u64) -> bool {
    k >= from && n - k >= from
}

impl Replicate {
    /// One generation of the generation scheme. Returns [`Status::Switch`] without drawing
    /// anything when no deme qualifies for leaping.
    pub(crate) fn leap_generation<R: Rng, const K: u8>(
        &mut self,
        t: &Tables,
        rng: &mut R,
    ) -> Status {
        let mut w = std::mem::take(&mut self.leap);
        let status = self.leap_with::<R, K>(t, rng, &mut w);
        self.leap = w;
        status
    }

    fn leap_with<R: Rng, const K: u8>(
        &mut self,
        t: &Tables,
        rng: &mut R,
        w: &mut LeapWork,
    ) -> Status {
        let m = t.demes();
        // 1. rates at the generation's start: which demes leap, and the estimated counts at
        // mid-generation
        self.source_values::<K>(t, w);
        let per_generation = self.per_generation::<K>(t);
        let (mut any_leaped, mut active) = (false, false);
        for i in 0..m {
            let (u, d) = self.deme_rates::<K>(t, w, i);
            let (gain, loss) = (u * per_generation, d * per_generation);
            let ki = self.k[i];
            let leap =
                hands_over(ki, t.n[i], LEAP_WHILE_COPIES) || gain + loss >= LEAP_FROM_CHANGES;
            w.leaped[i] = leap;
            any_leaped |= leap;
            active |= gain + loss > 0.0;
            w.start_k[i] = ki;
            let mid = (as_f64(ki) + 0.5 * (gain - loss)).round();
            w.mid_k[i] = mid.clamp(0.0, t.nf[i]) as u64;
        }
        if !active {
            // no event can change a non-absorbing state: frozen
            self.ticks = self.last_change;
            return Status::Done(End::Lost);
        }
        if !any_leaped {
            return Status::Switch;
        }
        let start = self.ticks;
        if t.max_ticks - start.min(t.max_ticks) < t.total {
            self.ticks = t.max_ticks;
            return Status::Done(End::Unresolved);
        }
        // 2. leaped demes: gains and losses drawn with the rates at the midpoint
        self.k.copy_from_slice(&w.mid_k);
        self.variants = self.k.iter().sum();
        self.source_values::<K>(t, w);
        let per_generation = self.per_generation::<K>(t);
        let denom = self.denominator::<K>(t);
        for i in 0..m {
            w.next_k[i] = w.start_k[i];
            if w.leaped[i] {
                let (u, d) = self.deme_rates::<K>(t, w, i);
                let moved = w.start_k[i].saturating_add(poisson(rng, u * per_generation));
                w.next_k[i] = moved
                    .saturating_sub(poisson(rng, d * per_generation))
                    .min(t.n[i]);
            }
        }
        // 3. the other demes event by event from their start counts, with the leaped demes
        // as sources held at their midpoint counts
        for i in 0..m {
            if !w.leaped[i] {
                self.k[i] = w.start_k[i];
                (w.a[i], w.c[i]) = t.source_values::<K>(i, self.k[i]);
            }
        }
        self.boundary_events::<R, K>(t, rng, w, start, denom);
        // 4. the leaped demes take their new counts at the generation's end
        let end = start + t.total;
        self.ticks = end;
        let mut changed = false;
        for i in 0..m {
            if w.leaped[i] {
                changed |= w.next_k[i] != w.start_k[i];
                self.k[i] = w.next_k[i];
                self.record_arrivals(t, i);
            }
        }
        self.changes += 1;
        if changed {
            self.last_change = end;
        }
        self.variants = self.k.iter().sum();
        if self.variants == 0 {
            Status::Done(End::Lost)
        } else if self.variants == t.total {
            Status::Done(End::Fixed)
        } else {
            Status::Running
        }
    }

    /// Source values `(a_j, c_j)` of the current counts into `w`.
    fn source_values<const K: u8>(&self, t: &Tables, w: &mut LeapWork) {
        for j in 0..t.demes() {
            (w.a[j], w.c[j]) = t.source_values::<K>(j, self.k[j]);
        }
    }

    /// Expected changes per generation per unit rate: `N / denominator` (the per-event
    /// probability is rate / denominator, and a generation is `N` events).
    fn per_generation<const K: u8>(&self, t: &Tables) -> f64 {
        t.totalf / self.denominator::<K>(t)
    }

    /// `(u_i, d_i)` of deme `i` from the source values in `w` and the current counts.
    #[inline(always)]
    fn deme_rates<const K: u8>(&self, t: &Tables, w: &LeapWork, i: usize) -> (f64, f64) {
        let (p, q, _, _) = target_sums(t, &self.k, i, &w.a, &w.c);
        let ki = self.k[i];
        rates::<K>(p, q, as_f64(t.n[i] - ki), as_f64(ki), t.inv_n[i])
    }

    /// Runs the demes that are not leaped event by event through the `N` events of the
    /// generation that started at tick `start`, with the leaped demes held at their counts.
    fn boundary_events<R: Rng, const K: u8>(
        &mut self,
        t: &Tables,
        rng: &mut R,
        w: &mut LeapWork,
        start: u64,
        denom: f64,
    ) {
        let m = t.demes();
        for i in 0..m {
            let (u, d) = if w.leaped[i] {
                (0.0, 0.0)
            } else {
                self.deme_rates::<K>(t, w, i)
            };
            w.tree.set_pair(i, u, d);
        }
        let mut used = 0u64;
        loop {
            let total = w.tree.total();
            if total <= 0.0 {
                return;
            }
            let lambda = match K {
                BD => total / denom,
                _ => total * t.inv_total,
            };
            let (wait, v) = draw_wait(rng, total, denom, lambda);
            if wait > t.total - used {
                // no further change among the generation's remaining events (memoryless)
                return;
            }
            used += wait;
            let leaf = w.tree.find(v);
            let (j, up) = (leaf >> 1, leaf & 1 == 0);
            if up {
                self.k[j] += 1;
            } else {
                self.k[j] -= 1;
            }
            (w.a[j], w.c[j]) = t.source_values::<K>(j, self.k[j]);
            let line = t.infl_start[j]..t.infl_start[j + 1];
            for &i in &t.infl_target[line] {
                if !w.leaped[i] {
                    let (u, d) = self.deme_rates::<K>(t, w, i);
                    w.tree.set_pair(i, u, d);
                }
            }
            let (u, d) = self.deme_rates::<K>(t, w, j);
            w.tree.set_pair(j, u, d);
            self.ticks = start + used;
            self.changes += 1;
            self.last_change = self.ticks;
            if up {
                self.record_arrivals(t, j);
            }
        }
    }

    /// One leaped generation, dispatched on the rule.
    pub(crate) fn leap_generation_any<R: Rng>(&mut self, t: &Tables, rng: &mut R) -> Status {
        match t.code() {
            DB_DEME => self.leap_generation::<R, DB_DEME>(t, rng),
            DB_NEIGHBOURHOOD => self.leap_generation::<R, DB_NEIGHBOURHOOD>(t, rng),
            _ => self.leap_generation::<R, BD>(t, rng),
        }
    }
}
