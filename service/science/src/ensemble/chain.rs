//! One replicate of the chain on the count vector: a pure step on a replicate state, and the
//! loop that runs a replicate to its end.
//!
//! Death-birth and birth-death run as a jump chain. The state keeps, per deme `i`, the rate
//! `u_i` of `k -> k + e_i` and `d_i` of `k -> k - e_i` (the model's per-event probabilities
//! times a common denominator: `N` for death-birth, `W = r K + N - K` for birth-death). The
//! chance that an event changes the state is `lambda = sum (u + d) / denominator`; the number
//! of events up to and including the change is Geometric(`lambda`), and the change is picked
//! in proportion to the rates. For `lambda >= DIRECT_FROM` the events are simply run one by
//! one (one uniform each; the uniform of the changing event also picks the change), below it
//! the count is drawn at once as `1 + floor(E / -ln(1 - lambda))`, `E ~ Exp(1)`, and the
//! change by a fresh uniform. Both give the same distribution; the switch only saves work.
//!
//! Wright-Fisher draws one binomial per deme per generation. Its refill probabilities come
//! from one sparse product over the matrix's nonzeros with the source values of death-birth
//! under the same scope (`p_i = P_i`, `q_i = Q_i` under `deme` scope, normalised by
//! `P_i + Q_i` under `neighbourhood` scope), each of `p_i`, `q_i` its own sum; a deme with
//! `p_i = 0` or `q_i = 0` is refilled with 0 or `n_i` variants without a draw. A generation
//! costs `O(m + nnz)` plus one draw per deme whose outcome is open, whatever the sizes.
//!
//! Under the generation scheme (see [`super::scheme`]) a death-birth or birth-death replicate
//! starts on the jump chain and alternates with leaped generations by the switch rule of
//! `chain/leap.rs`: a state change that leaves its deme with [`LEAP_FROM_COPIES`] of each
//! type ends the jump chain's run (`Status::Switch`); a generation with nothing to leap
//! hands back, and the jump chain's sums are rebuilt from the counts. Under the event scheme
//! the threshold is `u64::MAX` and the jump chain never hands over.
//!
//! Sizes: counts, sizes and ticks are `u64` (a deme of `10^8` and `N` up to `2^53` are fine;
//! the tick limit `max_generations * N` saturates), counts enter floats through `i64`
//! (exact below `2^53`), and time sums are `u128` in the accumulator.
//!
//! Every rate is built from per-target sums over source demes, `P_i = sum_j w_ij a_j` and
//! `Q_i = sum_j w_ij c_j`, where `w` is the rule's matrix and `(a_j, c_j)` depend on `k_j`
//! alone:
//!
//! | rule, scope | `w_ij` | `(a_j, c_j)` | `(u_i, d_i)` |
//! |---|---|---|---|
//! | death-birth, deme | `B[i][j]` | `(r k_j, n_j - k_j) / (r k_j + n_j - k_j)` | `((n_i - k_i) P_i, k_i Q_i)` |
//! | death-birth, neighbourhood | `B[i][j]` | `(r k_j, n_j - k_j) / n_j` | `((n_i - k_i) P_i, k_i Q_i) / (P_i + Q_i)` |
//! | birth-death | `F[j][i]` | `(r k_j, n_j - k_j)` | `((n_i - k_i) P_i, k_i Q_i) / n_i` |
//!
//! When `k_j` changes only the targets `i` with `w_ij > 0` change (column `j` of `B`, row `j`
//! of `F`), so an event costs `O(nonzeros of that line)`. Two layouts keep the rates:
//! for few demes or a dense matrix (the dense path) every array is per deme and an event
//! rewrites all sums and rates in one fused pass over the dense line of `j`, then picks the
//! change by a linear scan; otherwise (the sparse path) a sum tree over the `2 m` rates is
//! updated along the changed paths. Integer counts of sources holding variants and
//! residents make a sum that must be 0 exactly 0, and all sums are rebuilt from scratch
//! every [`REFRESH_EVERY`] state changes, so rounding never accumulates without bound.

mod lanes;
mod leap;
mod small;

pub(crate) use lanes::run_in_lanes;

pub use leap::{LEAP_FROM_CHANGES, LEAP_FROM_COPIES, LEAP_WHILE_COPIES};
pub use small::SMALL_MAX_DEMES;

use super::scheme::Stepping;
use super::stream::uniform;
use super::tree::SumTree;
use crate::model::{Model, Rule, Scope};
use crate::start::Start;
use leap::{hands_over, LeapWork};
use rand::Rng;
use rand_distr::{Binomial, Distribution, Exp1};
use serde::{Deserialize, Serialize};

/// State changes between two rebuilds of the incremental sums (a fixed number, so a
/// replicate is the same whatever else runs).
pub const REFRESH_EVERY: u64 = 4096;

/// Up to this many demes (or with a dense matrix, at least a quarter of its entries
/// nonzero, and at most [`DENSE_MAX_DEMES`] demes) all rates are rewritten in one pass per
/// event and the change is found by a linear scan; above it, only the changed rates and
/// their ancestors in a sum tree are updated.
pub const REBUILD_ALL_DEMES: usize = 32;

/// Largest number of demes given the dense path for a dense matrix (it stores the matrix
/// again as `m * m` floats).
pub const DENSE_MAX_DEMES: usize = 1024;

/// From this chance `lambda` that an event changes the state, events are run one by one
/// (expected `1 / lambda` uniforms) instead of drawing their number from a logarithm and an
/// exponential variate. Either way the number is Geometric(`lambda`).
pub const DIRECT_FROM: f64 = 0.2;

/// How a replicate ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum End {
    /// Every individual carries the variant.
    Fixed,
    /// The variant is gone, or the chain froze in a state it can never leave
    /// (possible with a reducible matrix) without having fixed.
    Lost,
    /// Still running after `max_generations`.
    Unresolved,
}

/// What one replicate produced. Times are in ticks: events for death-birth and birth-death,
/// generations for Wright-Fisher.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ReplicateOutcome {
    /// How it ended.
    pub end: End,
    /// Ticks until fixation or loss (the last state change if the chain froze); for an
    /// unresolved replicate, the tick at which it was stopped.
    pub time: u64,
    /// Number of state changes: events that changed the count vector, Wright-Fisher
    /// generations, and under the generation scheme one per leaped generation plus the
    /// changes run event by event inside it.
    pub state_changes: u64,
    /// For a fixed replicate, `arrivals[deme * fractions + f]` is the first tick at which
    /// the variant's count in `deme` reached `ceil(arrival_fractions[f] * n_deme)`; empty
    /// otherwise.
    pub arrivals: Vec<u64>,
}

// Kind codes for the monomorphised hot loop (`const K: u8`).
const DB_DEME: u8 = 0;
const DB_NEIGHBOURHOOD: u8 = 1;
const BD: u8 = 2;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    DeathBirthDeme,
    DeathBirthNeighbourhood,
    BirthDeath,
    WrightFisher,
}

/// Read-only tables of one cell, shared by all replicates.
#[derive(Debug, Clone)]
pub(crate) struct Tables {
    kind: Kind,
    r: f64,
    n: Vec<u64>,
    inv_n: Vec<f64>,
    /// `n_i` as a float.
    nf: Vec<f64>,
    total: u64,
    totalf: f64,
    inv_total: f64,
    /// Targets `(i, w_ij)` of source `j`: `infl_*[infl_start[j]..infl_start[j + 1]]`.
    infl_start: Vec<usize>,
    infl_target: Vec<usize>,
    infl_w: Vec<f64>,
    /// Sources `(j, w_ij)` of target `i`.
    src_start: Vec<usize>,
    src_idx: Vec<usize>,
    src_w: Vec<f64>,
    /// Dense path: `wcol[j * m + i] = w_ij`, the targets of source `j` with zeros.
    wcol: Vec<f64>,
    /// Arrival thresholds of deme `i`, ascending: `arr_*[arr_start[i]..arr_start[i + 1]]`.
    arr_start: Vec<usize>,
    arr_thr: Vec<u64>,
    arr_slot: Vec<usize>,
    pub(crate) fractions: usize,
    pub(crate) rebuild_all: bool,
    refresh_every: u64,
    /// Tick limit: `max_generations * N` events, or `max_generations` generations.
    max_ticks: u64,
    /// A state change leaving its deme with this many of each type hands the jump chain
    /// over to the generation scheme (`u64::MAX`: never, the event scheme).
    leap_from: u64,
    /// Source-value code of Wright-Fisher's recruitment (`DB_DEME` or `DB_NEIGHBOURHOOD`,
    /// the scopes of death-birth's `p_i`).
    wf_code: u8,
    /// Fixed start deme, or cumulative start weights to draw it from.
    start_deme: Option<usize>,
    start_cumulative: Vec<f64>,
    /// The all-resident state with every sum built, copied at the start of each replicate
    /// (jump chains only).
    resident: Option<Box<Replicate>>,
}

/// Count to float through `i64` (one instruction on x86-64; counts are far below 2^63).
#[inline(always)]
fn as_f64(x: u64) -> f64 {
    x as i64 as f64
}

/// `ceil(f n)` read with a relative tolerance of 1e-9, so that `0.3 * 10` gives 3, not 4.
pub(crate) fn arrival_threshold(f: f64, n: u64) -> u64 {
    let x = f * n as f64;
    let c = (x - 1e-9 * x.max(1.0)).ceil();
    (c.max(1.0) as u64).min(n)
}

impl Tables {
    pub(crate) fn new(
        model: &Model,
        start: Start,
        max_generations: u64,
        fractions: &[f64],
        stepping: Stepping,
    ) -> Self {
        let kind = match (model.rule(), model.scope()) {
            (Rule::DeathBirth, Scope::Deme) => Kind::DeathBirthDeme,
            (Rule::DeathBirth, Scope::Neighbourhood) => Kind::DeathBirthNeighbourhood,
            (Rule::BirthDeath, _) => Kind::BirthDeath,
            (Rule::WrightFisher, _) => Kind::WrightFisher,
        };
        let m = model.demes();
        let kernel = model.kernel();
        let n = model.sizes().to_vec();
        let (mut infl_start, mut infl_target, mut infl_w) = (vec![0], Vec::new(), Vec::new());
        let (mut src_start, mut src_idx, mut src_w) = (vec![0], Vec::new(), Vec::new());
        for j in 0..m {
            // birth-death: j disperses along row j of F; otherwise j recruits into column j of B
            let targets: Vec<(usize, f64)> = match kind {
                Kind::BirthDeath => kernel.row(j).collect(),
                _ => kernel.col(j).collect(),
            };
            for (i, w) in targets {
                infl_target.push(i);
                infl_w.push(w);
            }
            infl_start.push(infl_target.len());
        }
        for i in 0..m {
            let sources: Vec<(usize, f64)> = match kind {
                Kind::BirthDeath => kernel.col(i).collect(),
                _ => kernel.row(i).collect(),
            };
            for (j, w) in sources {
                src_idx.push(j);
                src_w.push(w);
            }
            src_start.push(src_idx.len());
        }
        let (mut arr_start, mut arr_thr, mut arr_slot) = (vec![0], Vec::new(), Vec::new());
        for (i, &ni) in n.iter().enumerate() {
            let mut list: Vec<(u64, usize)> = fractions
                .iter()
                .enumerate()
                .map(|(f, &x)| (arrival_threshold(x, ni), i * fractions.len() + f))
                .collect();
            list.sort_unstable();
            for (t, slot) in list {
                arr_thr.push(t);
                arr_slot.push(slot);
            }
            arr_start.push(arr_thr.len());
        }
        let total = model.total();
        let max_ticks = match kind {
            Kind::WrightFisher => max_generations,
            _ => max_generations.saturating_mul(total),
        };
        let (start_deme, start_cumulative) = match start {
            Start::Deme(i) => (Some(i), Vec::new()),
            other => {
                let mut acc = 0.0;
                let cumulative = other
                    .deme_weights(model)
                    .into_iter()
                    .map(|w| {
                        acc += w;
                        acc
                    })
                    .collect();
                (None, cumulative)
            }
        };
        let mut tables = Self {
            kind,
            r: model.fitness(),
            inv_n: n.iter().map(|&x| 1.0 / x as f64).collect(),
            nf: n.iter().map(|&x| as_f64(x)).collect(),
            n,
            total,
            totalf: total as f64,
            inv_total: 1.0 / total as f64,
            infl_start,
            infl_target,
            infl_w,
            src_start,
            src_idx,
            src_w,
            wcol: Vec::new(),
            arr_start,
            arr_thr,
            arr_slot,
            fractions: fractions.len(),
            // a dense matrix costs O(m) per event anyway: scan rather than keep a tree
            rebuild_all: m <= REBUILD_ALL_DEMES
                || (4 * kernel.nnz() >= m * m && m <= DENSE_MAX_DEMES),
            refresh_every: REFRESH_EVERY,
            max_ticks,
            leap_from: if stepping.leaps(model.rule()) {
                LEAP_FROM_COPIES
            } else {
                u64::MAX
            },
            wf_code: match model.scope() {
                Scope::Deme => DB_DEME,
                Scope::Neighbourhood => DB_NEIGHBOURHOOD,
            },
            start_deme,
            start_cumulative,
            resident: None,
        };
        tables.build_resident();
        tables
    }

    /// Builds the all-resident snapshot (again, after a change of the selection method).
    pub(crate) fn build_resident(&mut self) {
        self.resident = None;
        self.wcol = Vec::new();
        if self.rebuild_all && self.kind != Kind::WrightFisher {
            let m = self.demes();
            self.wcol = vec![0.0; m * m];
            for j in 0..m {
                let line = self.infl_start[j]..self.infl_start[j + 1];
                for (&i, &w) in self.infl_target[line.clone()]
                    .iter()
                    .zip(&self.infl_w[line])
                {
                    self.wcol[j * m + i] = w;
                }
            }
        }
        if self.kind != Kind::WrightFisher {
            let mut base = Replicate::new(self);
            base.refresh(self);
            self.resident = Some(Box::new(base));
        }
    }

    fn demes(&self) -> usize {
        self.n.len()
    }

    /// `(a_j, c_j)` for a source deme holding `kj` variants.
    #[inline(always)]
    fn source_values<const K: u8>(&self, j: usize, kj: u64) -> (f64, f64) {
        let mutant = self.r * as_f64(kj);
        let resident = as_f64(self.n[j] - kj);
        match K {
            DB_DEME => {
                let w = mutant + resident;
                (mutant / w, resident / w)
            }
            DB_NEIGHBOURHOOD => (mutant * self.inv_n[j], resident * self.inv_n[j]),
            _ => (mutant, resident),
        }
    }

    fn code(&self) -> u8 {
        match self.kind {
            Kind::DeathBirthDeme => DB_DEME,
            Kind::DeathBirthNeighbourhood => DB_NEIGHBOURHOOD,
            Kind::BirthDeath | Kind::WrightFisher => BD,
        }
    }

    fn draw_start<R: Rng>(&self, rng: &mut R) -> usize {
        if let Some(i) = self.start_deme {
            return i;
        }
        let total = *self.start_cumulative.last().expect("at least one deme");
        let v = uniform(rng) * total;
        let mut last_positive = 0;
        let mut prev = 0.0;
        for (i, &c) in self.start_cumulative.iter().enumerate() {
            if c > prev {
                if v < c {
                    return i;
                }
                last_positive = i;
            }
            prev = c;
        }
        last_positive
    }
}

/// Sums and counts of one deme (sparse path): as a source, `(a_j, c_j)`; as a target,
/// `(P_i, Q_i)` and the numbers of its sources holding variants (`nv`) and residents (`nr`).
#[derive(Debug, Clone, Copy, Default)]
struct DemeSums {
    a: f64,
    c: f64,
    p: f64,
    q: f64,
    nv: u32,
    nr: u32,
}

/// Per-deme state of the dense path, one array per quantity (struct of arrays), every array
/// of length `m`: the loops over targets then run over equal-length slices without bounds
/// checks.
#[derive(Debug, Clone, Default)]
struct Dense {
    /// `k_i` as a float.
    kf: Vec<f64>,
    /// Source values `(a_j, c_j)`.
    a: Vec<f64>,
    c: Vec<f64>,
    /// Target sums `(P_i, Q_i)`.
    p: Vec<f64>,
    q: Vec<f64>,
    /// Sources of target `i` holding variants and residents.
    nv: Vec<u32>,
    nr: Vec<u32>,
    /// Rates `u_i`, `d_i` and their sum `s_i = u_i + d_i`.
    u: Vec<f64>,
    d: Vec<f64>,
    s: Vec<f64>,
    /// `sum_i s_i`, added in deme order.
    total: f64,
}

impl Dense {
    fn new(m: usize) -> Self {
        Self {
            kf: vec![0.0; m],
            a: vec![0.0; m],
            c: vec![0.0; m],
            p: vec![0.0; m],
            q: vec![0.0; m],
            nv: vec![0; m],
            nr: vec![0; m],
            u: vec![0.0; m],
            d: vec![0.0; m],
            s: vec![0.0; m],
            total: 0.0,
        }
    }

    fn copy_from(&mut self, o: &Self) {
        self.kf.copy_from_slice(&o.kf);
        self.a.copy_from_slice(&o.a);
        self.c.copy_from_slice(&o.c);
        self.p.copy_from_slice(&o.p);
        self.q.copy_from_slice(&o.q);
        self.nv.copy_from_slice(&o.nv);
        self.nr.copy_from_slice(&o.nr);
        self.u.copy_from_slice(&o.u);
        self.d.copy_from_slice(&o.d);
        self.s.copy_from_slice(&o.s);
        self.total = o.total;
    }

    /// Adds `w_i * (da, dc)` to every target's `(P_i, Q_i)` (`w` is the changed source's
    /// dense column, zeros included: adding `0 * da` leaves a sum unchanged), zeroes a sum
    /// whose source count is 0 when `ZERO` (only after a count changed), and rewrites every
    /// rate and the total in one fused pass.
    #[inline(always)]
    fn update<const K: u8, const ZERO: bool>(
        &mut self,
        w: &[f64],
        da: f64,
        dc: f64,
        nf: &[f64],
        inv_n: &[f64],
    ) {
        let m = w.len();
        let (p, q) = (&mut self.p[..m], &mut self.q[..m]);
        let (u, d, s) = (&mut self.u[..m], &mut self.d[..m], &mut self.s[..m]);
        let (kf, nf, inv_n) = (&self.kf[..m], &nf[..m], &inv_n[..m]);
        let (nv, nr) = (&self.nv[..m], &self.nr[..m]);
        let mut total = 0.0;
        for i in 0..m {
            let mut pi = p[i] + w[i] * da;
            let mut qi = q[i] + w[i] * dc;
            if ZERO {
                if nv[i] == 0 {
                    pi = 0.0;
                }
                if nr[i] == 0 {
                    qi = 0.0;
                }
            }
            p[i] = pi;
            q[i] = qi;
            let (ui, di) = rates::<K>(pi, qi, nf[i] - kf[i], kf[i], inv_n[i]);
            u[i] = ui;
            d[i] = di;
            let si = ui + di;
            s[i] = si;
            total += si;
        }
        self.total = total;
    }

    /// Rewrites every rate and the total from `(P, Q)` and the counts.
    fn rates_all<const K: u8>(&mut self, nf: &[f64], inv_n: &[f64]) {
        let m = self.p.len();
        let mut total = 0.0;
        for i in 0..m {
            let (ui, di) = rates::<K>(
                self.p[i],
                self.q[i],
                nf[i] - self.kf[i],
                self.kf[i],
                inv_n[i],
            );
            self.u[i] = ui;
            self.d[i] = di;
            self.s[i] = ui + di;
            total += self.s[i];
        }
        self.total = total;
    }

    /// The change a point `v` of `[0, total)` falls on: scanning the demes in order, the
    /// deme `i` with `sum_{l < i} s_l <= v < sum_{l <= i} s_l`, then up if the remainder is
    /// below `u_i`. Never returns a move of rate 0: a point pushed past the end by rounding
    /// goes to the last deme with a positive rate.
    #[inline(always)]
    fn pick(&self, mut v: f64) -> (usize, bool) {
        let m = self.s.len();
        let (s, u, d) = (&self.s[..m], &self.u[..m], &self.d[..m]);
        for i in 0..m {
            let si = s[i];
            if v < si {
                return (i, v < u[i] || d[i] == 0.0);
            }
            v -= si;
        }
        let i = s
            .iter()
            .rposition(|&x| x > 0.0)
            .expect("a positive total has a positive rate");
        (i, d[i] == 0.0)
    }
}

/// `(u_i, d_i)` from `(P_i, Q_i)`, the vacant and held places `(n_i - k_i, k_i)` and `1/n_i`
/// (the table in the module documentation).
#[inline(always)]
fn rates<const K: u8>(p: f64, q: f64, vacant: f64, held: f64, inv_n: f64) -> (f64, f64) {
    rates_padded::<K>(p, q, vacant, held, inv_n, 0.0)
}

/// [`rates`] with `pad` added to the neighbourhood normaliser `P + Q`: 0 for a real deme,
/// 1 for a padding deme of the small path (where `P = Q = 0` and both rates are 0).
#[inline(always)]
fn rates_padded<const K: u8>(
    p: f64,
    q: f64,
    vacant: f64,
    held: f64,
    inv_n: f64,
    pad: f64,
) -> (f64, f64) {
    let p = p.max(0.0);
    let q = q.max(0.0);
    match K {
        DB_DEME => (vacant * p, held * q),
        DB_NEIGHBOURHOOD => {
            let s = p + q + pad;
            (vacant * p / s, held * q / s)
        }
        _ => (vacant * p * inv_n, held * q * inv_n),
    }
}

/// The number of events up to and including the next state change, Geometric(`lambda`) with
/// `lambda = total / denom`, and a point `v` uniform on `[0, total)` independent of it that
/// picks the change (see [`Replicate::jump_step`]).
#[inline(always)]
fn draw_wait<R: Rng>(rng: &mut R, total: f64, denom: f64, lambda: f64) -> (u64, f64) {
    if lambda >= DIRECT_FROM {
        let mut wait = 1u64;
        loop {
            let v = uniform(rng) * denom;
            if v < total {
                return (wait, v);
            }
            wait += 1;
        }
    }
    // Geometric(lambda) on {1, 2, ...} as 1 + floor(E / -log(1 - lambda)) with E ~ Exp(1)
    // (drawn by ziggurat, which saves a logarithm); log1p only where 1 - lambda would lose
    // digits. The float-to-int cast saturates.
    let log_stay = if lambda < 0.01 {
        (-lambda).ln_1p()
    } else {
        (1.0 - lambda).ln()
    };
    let e: f64 = Exp1.sample(rng);
    let x = e / -log_stay;
    ((x as u64).saturating_add(1), uniform(rng) * total)
}

/// Result of one step of a replicate.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Status {
    /// The state changed and is not absorbing.
    Running,
    /// The replicate changes scheme: the event chain hands over to leaped generations, or
    /// a generation with nothing to leap hands back to the event chain.
    Switch,
    /// The replicate ended.
    Done(End),
}

/// The mutable state of one replicate; reused across replicates of a thread (every field is
/// reset by [`Replicate::reset`], so a replicate never depends on the one before).
#[derive(Debug, Clone)]
pub(crate) struct Replicate {
    pub(crate) k: Vec<u64>,
    variants: u64,
    /// Sparse path: per-deme sums and counts, one record per deme, and the rates in a sum
    /// tree (leaf `2 i` is `u_i`, leaf `2 i + 1` is `d_i`). Empty on the dense path.
    st: Vec<DemeSums>,
    tree: SumTree,
    /// Dense path state; empty on the sparse path.
    dense: Dense,
    /// Ticks so far (events or generations), and the tick of the last state change.
    ticks: u64,
    last_change: u64,
    changes: u64,
    since_refresh: u64,
    arrivals: Vec<u64>,
    next_arrival: Vec<usize>,
    /// Wright-Fisher scratch: source values `(a_j, c_j)` and refill probabilities
    /// `(p_i, q_i)` of the generation's start; empty for the jump chains.
    wf: WrightFisherWork,
    /// Scratch of the generation scheme; empty unless the replicate may leap.
    leap: LeapWork,
}

/// Per-generation scratch of a Wright-Fisher replicate.
#[derive(Debug, Clone, Default)]
struct WrightFisherWork {
    a: Vec<f64>,
    c: Vec<f64>,
    p: Vec<f64>,
    q: Vec<f64>,
}

impl Replicate {
    pub(crate) fn new(t: &Tables) -> Self {
        let m = t.demes();
        let jump = t.kind != Kind::WrightFisher;
        let (sparse_m, dense_m) = match (jump, t.rebuild_all) {
            (false, _) => (0, 0),
            (true, true) => (0, m),
            (true, false) => (m, 0),
        };
        Self {
            k: vec![0; m],
            variants: 0,
            st: vec![DemeSums::default(); sparse_m],
            tree: SumTree::new(2 * sparse_m),
            dense: Dense::new(dense_m),
            ticks: 0,
            last_change: 0,
            changes: 0,
            since_refresh: 0,
            arrivals: vec![u64::MAX; m * t.fractions],
            next_arrival: vec![0; m],
            wf: if jump {
                WrightFisherWork::default()
            } else {
                WrightFisherWork {
                    a: vec![0.0; m],
                    c: vec![0.0; m],
                    p: vec![0.0; m],
                    q: vec![0.0; m],
                }
            },
            leap: if jump && t.leap_from != u64::MAX {
                LeapWork::new(m)
            } else {
                LeapWork::default()
            },
        }
    }

    /// Puts one variant in deme `start` at tick 0 and rebuilds every sum.
    pub(crate) fn reset(&mut self, t: &Tables, start: usize) {
        self.ticks = 0;
        self.last_change = 0;
        self.changes = 0;
        self.since_refresh = 0;
        self.arrivals.iter_mut().for_each(|x| *x = u64::MAX);
        self.next_arrival.copy_from_slice(&t.arr_start[..t.demes()]);
        match &t.resident {
            Some(base) => {
                // copy the all-resident sums (O(m)), then add the variant incrementally
                self.k.copy_from_slice(&base.k);
                if t.rebuild_all {
                    self.dense.copy_from(&base.dense);
                } else {
                    self.st.copy_from_slice(&base.st);
                    self.tree.clone_from(&base.tree);
                }
                self.variants = 0;
                self.add_first(t, start);
            }
            None => {
                self.k.iter_mut().for_each(|x| *x = 0);
                self.k[start] = 1;
                self.variants = 1;
                self.record_arrivals(t, start);
            }
        }
    }

    fn add_first(&mut self, t: &Tables, start: usize) {
        match (t.code(), t.rebuild_all) {
            (DB_DEME, true) => self.apply_dense::<DB_DEME>(t, start, true),
            (DB_DEME, false) => self.apply::<DB_DEME>(t, start, true),
            (DB_NEIGHBOURHOOD, true) => self.apply_dense::<DB_NEIGHBOURHOOD>(t, start, true),
            (DB_NEIGHBOURHOOD, false) => self.apply::<DB_NEIGHBOURHOOD>(t, start, true),
            (_, true) => self.apply_dense::<BD>(t, start, true),
            (_, false) => self.apply::<BD>(t, start, true),
        }
    }

    /// Runs the jump chain until the replicate ends or hands over to the generation scheme.
    fn run_jump<R: Rng, const K: u8, const ALL: bool>(
        &mut self,
        t: &Tables,
        rng: &mut R,
    ) -> Status {
        loop {
            match self.jump_step::<R, K, ALL>(t, rng) {
                Status::Running => {}
                other => return other,
            }
        }
    }

    /// One jump-chain step, dispatched on the rule at run time (for tests).
    #[cfg(test)]
    pub(crate) fn jump_step_any<R: Rng>(&mut self, t: &Tables, rng: &mut R) -> Status {
        match (t.code(), t.rebuild_all) {
            (DB_DEME, true) => self.jump_step::<R, DB_DEME, true>(t, rng),
            (DB_DEME, false) => self.jump_step::<R, DB_DEME, false>(t, rng),
            (DB_NEIGHBOURHOOD, true) => self.jump_step::<R, DB_NEIGHBOURHOOD, true>(t, rng),
            (DB_NEIGHBOURHOOD, false) => self.jump_step::<R, DB_NEIGHBOURHOOD, false>(t, rng),
            (_, true) => self.jump_step::<R, BD, true>(t, rng),
            (_, false) => self.jump_step::<R, BD, false>(t, rng),
        }
    }

    /// Denominator turning rates into per-event probabilities.
    #[inline(always)]
    pub(crate) fn denominator<const K: u8>(&self, t: &Tables) -> f64 {
        match K {
            BD => t.r * as_f64(self.variants) + as_f64(t.total - self.variants),
            _ => t.totalf,
        }
    }

    /// Rebuilds all sums, counts and rates from the count vector.
    pub(crate) fn refresh(&mut self, t: &Tables) {
        match (t.code(), t.rebuild_all) {
            (DB_DEME, true) => self.refresh_dense::<DB_DEME>(t),
            (DB_DEME, false) => self.refresh_with::<DB_DEME>(t),
            (DB_NEIGHBOURHOOD, true) => self.refresh_dense::<DB_NEIGHBOURHOOD>(t),
            (DB_NEIGHBOURHOOD, false) => self.refresh_with::<DB_NEIGHBOURHOOD>(t),
            (_, true) => self.refresh_dense::<BD>(t),
            (_, false) => self.refresh_with::<BD>(t),
        }
    }

    /// `(P_i, Q_i, nv_i, nr_i)` of target `i` from the source values `(a, c)`, in source
    /// order, with a sum whose source count is 0 set to exactly 0.
    #[inline(always)]
    fn target_sums(&self, t: &Tables, i: usize, a: &[f64], c: &[f64]) -> (f64, f64, u32, u32) {
        target_sums(t, &self.k, i, a, c)
    }
}

/// `(P_i, Q_i, nv_i, nr_i)` of target `i` for the counts `k` and source values `(a, c)`, in
/// source order, with a sum whose source count is 0 set to exactly 0.
fn target_sums(t: &Tables, k: &[u64], i: usize, a: &[f64], c: &[f64]) -> (f64, f64, u32, u32) {
    {
        let (mut p, mut q, mut nv, mut nr) = (0.0, 0.0, 0u32, 0u32);
        for e in t.src_start[i]..t.src_start[i + 1] {
            let (j, w) = (t.src_idx[e], t.src_w[e]);
            p += w * a[j];
            q += w * c[j];
            nv += u32::from(k[j] > 0);
            nr += u32::from(k[j] < t.n[j]);
        }
        (
            if nv == 0 { 0.0 } else { p },
            if nr == 0 { 0.0 } else { q },
            nv,
            nr,
        )
    }
}

impl Replicate {
    fn refresh_with<const K: u8>(&mut self, t: &Tables) {
        self.since_refresh = 0;
        let m = t.demes();
        for j in 0..m {
            let (a, c) = t.source_values::<K>(j, self.k[j]);
            self.st[j].a = a;
            self.st[j].c = c;
        }
        let a: Vec<f64> = self.st.iter().map(|x| x.a).collect();
        let c: Vec<f64> = self.st.iter().map(|x| x.c).collect();
        for i in 0..m {
            let (p, q, nv, nr) = self.target_sums(t, i, &a, &c);
            self.st[i] = DemeSums {
                p,
                q,
                nv,
                nr,
                ..self.st[i]
            };
            self.update_rates::<K>(t, i);
        }
    }

    fn refresh_dense<const K: u8>(&mut self, t: &Tables) {
        self.since_refresh = 0;
        let m = t.demes();
        for j in 0..m {
            let (a, c) = t.source_values::<K>(j, self.k[j]);
            self.dense.a[j] = a;
            self.dense.c[j] = c;
            self.dense.kf[j] = as_f64(self.k[j]);
        }
        let mut dense = std::mem::take(&mut self.dense);
        for i in 0..m {
            let (p, q, nv, nr) = self.target_sums(t, i, &dense.a, &dense.c);
            dense.p[i] = p;
            dense.q[i] = q;
            dense.nv[i] = nv;
            dense.nr[i] = nr;
        }
        dense.rates_all::<K>(&t.nf, &t.inv_n);
        self.dense = dense;
    }

    /// Rate of `k -> k + e_i` (times the denominator).
    #[cfg(test)]
    pub(crate) fn up(&self, i: usize) -> f64 {
        if self.dense.u.is_empty() {
            self.tree.leaf(2 * i)
        } else {
            self.dense.u[i]
        }
    }

    /// Rate of `k -> k - e_i` (times the denominator).
    #[cfg(test)]
    pub(crate) fn down(&self, i: usize) -> f64 {
        if self.dense.d.is_empty() {
            self.tree.leaf(2 * i + 1)
        } else {
            self.dense.d[i]
        }
    }

    #[inline(always)]
    fn update_rates<const K: u8>(&mut self, t: &Tables, i: usize) {
        let ki = self.k[i];
        let (u, d) = rates::<K>(
            self.st[i].p,
            self.st[i].q,
            as_f64(t.n[i] - ki),
            as_f64(ki),
            t.inv_n[i],
        );
        self.tree.set_pair(i, u, d);
    }

    #[inline(always)]
    fn record_arrivals(&mut self, t: &Tables, i: usize) {
        let end = t.arr_start[i + 1];
        let mut at = self.next_arrival[i];
        while at < end && self.k[i] >= t.arr_thr[at] {
            self.arrivals[t.arr_slot[at]] = self.ticks;
            at += 1;
        }
        self.next_arrival[i] = at;
    }

    /// `k_j -> k_j + 1` (`up`) or `k_j - 1`; returns the changes `(dv, dr)` of the counts of
    /// sources holding variants and residents that `j` contributes to its targets.
    #[inline(always)]
    fn step_count(&mut self, t: &Tables, j: usize, up: bool) -> (i32, i32) {
        let nj = t.n[j];
        let kj = &mut self.k[j];
        if up {
            *kj += 1;
            self.variants += 1;
            (i32::from(*kj == 1), -i32::from(*kj == nj))
        } else {
            *kj -= 1;
            self.variants -= 1;
            (-i32::from(*kj == 0), i32::from(*kj == nj - 1))
        }
    }

    /// Sparse path: applies `k_j -> k_j +- 1` and updates the affected sums, rates and tree
    /// paths.
    #[inline(always)]
    fn apply<const K: u8>(&mut self, t: &Tables, j: usize, up: bool) {
        let (dv, dr) = self.step_count(t, j, up);
        let (a, c) = t.source_values::<K>(j, self.k[j]);
        let src = &mut self.st[j];
        let da = a - src.a;
        let dc = c - src.c;
        src.a = a;
        src.c = c;
        let line = t.infl_start[j]..t.infl_start[j + 1];
        for (&i, &w) in t.infl_target[line.clone()].iter().zip(&t.infl_w[line]) {
            let target = &mut self.st[i];
            target.p += w * da;
            target.q += w * dc;
            if dv != 0 {
                target.nv = target.nv.wrapping_add_signed(dv);
                if target.nv == 0 {
                    target.p = 0.0;
                }
            }
            if dr != 0 {
                target.nr = target.nr.wrapping_add_signed(dr);
                if target.nr == 0 {
                    target.q = 0.0;
                }
            }
            self.update_rates::<K>(t, i);
        }
        self.update_rates::<K>(t, j);
        if up {
            self.record_arrivals(t, j);
        }
    }

    /// Dense path: applies `k_j -> k_j +- 1` and rewrites every target's sums and rates in
    /// one pass over the dense column of `j`.
    #[inline(always)]
    fn apply_dense<const K: u8>(&mut self, t: &Tables, j: usize, up: bool) {
        let (dv, dr) = self.step_count(t, j, up);
        let kj = self.k[j];
        let (a, c) = t.source_values::<K>(j, kj);
        let dense = &mut self.dense;
        dense.kf[j] = as_f64(kj);
        let da = a - dense.a[j];
        let dc = c - dense.c[j];
        dense.a[j] = a;
        dense.c[j] = c;
        let m = t.demes();
        let w = &t.wcol[j * m..(j + 1) * m];
        if dv != 0 || dr != 0 {
            let line = t.infl_start[j]..t.infl_start[j + 1];
            for &i in &t.infl_target[line] {
                dense.nv[i] = dense.nv[i].wrapping_add_signed(dv);
                dense.nr[i] = dense.nr[i].wrapping_add_signed(dr);
            }
            dense.update::<K, true>(w, da, dc, &t.nf, &t.inv_n);
        } else {
            dense.update::<K, false>(w, da, dc, &t.nf, &t.inv_n);
        }
        if up {
            self.record_arrivals(t, j);
        }
    }

    /// One state change of the death-birth or birth-death jump chain.
    ///
    /// The events up to and including the change number Geometric(`lambda`). When
    /// `lambda >= DIRECT_FROM` the events are run one by one: each draws `v = U * denominator`
    /// and changes the state iff `v < total`, so the count of events is Geometric(`lambda`)
    /// and, given that the last one changed the state, its `v` is uniform on `[0, total)`
    /// and independent of the count; that `v` picks the change. Below, the count is drawn as
    /// `1 + floor(E / -ln(1 - lambda))` with `E ~ Exp(1)` and the change by a fresh uniform.
    #[inline(always)]
    pub(crate) fn jump_step<R: Rng, const K: u8, const ALL: bool>(
        &mut self,
        t: &Tables,
        rng: &mut R,
    ) -> Status {
        let total = if ALL {
            self.dense.total
        } else {
            self.tree.total()
        };
        if total <= 0.0 {
            // no event can change a non-absorbing state: frozen
            self.ticks = self.last_change;
            return Status::Done(End::Lost);
        }
        let denom = self.denominator::<K>(t);
        let lambda = match K {
            BD => total / denom,
            _ => total * t.inv_total,
        };
        let (wait, v) = draw_wait(rng, total, denom, lambda);
        self.ticks = self.ticks.saturating_add(wait);
        if self.ticks > t.max_ticks {
            self.ticks = t.max_ticks;
            return Status::Done(End::Unresolved);
        }
        let j = if ALL {
            let (j, up) = self.dense.pick(v);
            self.apply_dense::<K>(t, j, up);
            j
        } else {
            let leaf = self.tree.find(v);
            self.apply::<K>(t, leaf >> 1, leaf & 1 == 0);
            leaf >> 1
        };
        self.changes += 1;
        self.last_change = self.ticks;
        if self.variants == 0 {
            return Status::Done(End::Lost);
        }
        if self.variants == t.total {
            return Status::Done(End::Fixed);
        }
        self.since_refresh += 1;
        if self.since_refresh >= t.refresh_every {
            self.refresh(t);
        }
        if hands_over(self.k[j], t.n[j], t.leap_from) {
            return Status::Switch;
        }
        Status::Running
    }
    /// One Wright-Fisher generation: the refill probabilities of every deme by one sparse
    /// product over the matrix's nonzeros (`P_i = sum_j B[i][j] a_j`, `Q_i` likewise, the
    /// source values of death-birth under the same scope), then one binomial draw per deme
    /// whose outcome is not determined: a deme with no variant sources (`P_i = 0`) gets 0
    /// variants and one with no resident sources (`Q_i = 0`) gets `n_i`, without a draw.
    /// The cost is `O(m + nnz)` plus the draws, independent of the deme sizes.
    pub(crate) fn generation<R: Rng, const S: u8>(&mut self, t: &Tables, rng: &mut R) -> Status {
        if self.refill::<S>(t) {
            self.ticks = self.last_change;
            return Status::Done(End::Lost);
        }
        if self.ticks >= t.max_ticks {
            return Status::Done(End::Unresolved);
        }
        self.ticks += 1;
        let mut variants = 0;
        let w = &self.wf;
        for i in 0..t.demes() {
            let (p, q, n) = (w.p[i], w.q[i], t.n[i]);
            self.k[i] = if q == 0.0 {
                n
            } else if p == 0.0 {
                0
            } else {
                let draw = Binomial::new(n, p.min(1.0)).expect("p in (0, 1]");
                draw.sample(rng)
            };
            variants += self.k[i];
        }
        self.variants = variants;
        self.changes += 1;
        self.last_change = self.ticks;
        for i in 0..t.demes() {
            self.record_arrivals(t, i);
        }
        if variants == 0 {
            Status::Done(End::Lost)
        } else if variants == t.total {
            Status::Done(End::Fixed)
        } else {
            Status::Running
        }
    }

    /// Wright-Fisher refill probabilities `(p_i, q_i)` of the current counts into `self.wf`
    /// (each its own sum, so an impossible outcome has probability exactly 0); returns
    /// whether no deme can change (every deme settled: empty with `p_i = 0` or full with
    /// `q_i = 0`).
    fn refill<const S: u8>(&mut self, t: &Tables) -> bool {
        let w = &mut self.wf;
        for j in 0..t.demes() {
            (w.a[j], w.c[j]) = t.source_values::<S>(j, self.k[j]);
        }
        let mut frozen = true;
        for i in 0..t.demes() {
            let (p, q, _, _) = target_sums(t, &self.k, i, &w.a, &w.c);
            let (p, q) = match S {
                DB_NEIGHBOURHOOD => {
                    let s = p + q;
                    (p / s, q / s)
                }
                _ => (p, q),
            };
            w.p[i] = p;
            w.q[i] = q;
            let ki = self.k[i];
            frozen &= (p == 0.0 && ki == 0) || (q == 0.0 && ki == t.n[i]);
        }
        frozen
    }

    /// Runs Wright-Fisher generations until the replicate ends.
    fn run_wright_fisher<R: Rng, const S: u8>(&mut self, t: &Tables, rng: &mut R) -> End {
        loop {
            if let Status::Done(end) = self.generation::<R, S>(t, rng) {
                return end;
            }
        }
    }

    /// Runs a reset replicate on the small path of capacity `cap`, until it ends or hands
    /// over to the generation scheme.
    fn run_small_any<R: Rng>(&mut self, t: &Tables, rng: &mut R, cap: usize) -> Status {
        match (t.code(), cap) {
            (DB_DEME, 2) => self.run_small::<R, DB_DEME, 2>(t, rng),
            (DB_DEME, 4) => self.run_small::<R, DB_DEME, 4>(t, rng),
            (DB_DEME, 6) => self.run_small::<R, DB_DEME, 6>(t, rng),
            (DB_DEME, 8) => self.run_small::<R, DB_DEME, 8>(t, rng),
            (DB_DEME, 10) => self.run_small::<R, DB_DEME, 10>(t, rng),
            (DB_DEME, 12) => self.run_small::<R, DB_DEME, 12>(t, rng),
            (DB_DEME, 14) => self.run_small::<R, DB_DEME, 14>(t, rng),
            (DB_DEME, _) => self.run_small::<R, DB_DEME, 16>(t, rng),
            (DB_NEIGHBOURHOOD, 2) => self.run_small::<R, DB_NEIGHBOURHOOD, 2>(t, rng),
            (DB_NEIGHBOURHOOD, 4) => self.run_small::<R, DB_NEIGHBOURHOOD, 4>(t, rng),
            (DB_NEIGHBOURHOOD, 6) => self.run_small::<R, DB_NEIGHBOURHOOD, 6>(t, rng),
            (DB_NEIGHBOURHOOD, 8) => self.run_small::<R, DB_NEIGHBOURHOOD, 8>(t, rng),
            (DB_NEIGHBOURHOOD, 10) => self.run_small::<R, DB_NEIGHBOURHOOD, 10>(t, rng),
            (DB_NEIGHBOURHOOD, 12) => self.run_small::<R, DB_NEIGHBOURHOOD, 12>(t, rng),
            (DB_NEIGHBOURHOOD, 14) => self.run_small::<R, DB_NEIGHBOURHOOD, 14>(t, rng),
            (DB_NEIGHBOURHOOD, _) => self.run_small::<R, DB_NEIGHBOURHOOD, 16>(t, rng),
            (_, 2) => self.run_small::<R, BD, 2>(t, rng),
            (_, 4) => self.run_small::<R, BD, 4>(t, rng),
            (_, 6) => self.run_small::<R, BD, 6>(t, rng),
            (_, 8) => self.run_small::<R, BD, 8>(t, rng),
            (_, 10) => self.run_small::<R, BD, 10>(t, rng),
            (_, 12) => self.run_small::<R, BD, 12>(t, rng),
            (_, 14) => self.run_small::<R, BD, 14>(t, rng),
            (_, _) => self.run_small::<R, BD, 16>(t, rng),
        }
    }

    /// Runs the jump chain (its state built from the counts) until the replicate ends or
    /// hands over to the generation scheme.
    fn run_events<R: Rng>(&mut self, t: &Tables, rng: &mut R) -> Status {
        let small = match t.demes() {
            m @ 1..=SMALL_MAX_DEMES if t.rebuild_all => m + (m & 1),
            _ => 0,
        };
        match (t.kind, t.rebuild_all) {
            _ if small > 0 => self.run_small_any(t, rng, small),
            (Kind::DeathBirthDeme, true) => self.run_jump::<R, DB_DEME, true>(t, rng),
            (Kind::DeathBirthDeme, false) => self.run_jump::<R, DB_DEME, false>(t, rng),
            (Kind::DeathBirthNeighbourhood, true) => {
                self.run_jump::<R, DB_NEIGHBOURHOOD, true>(t, rng)
            }
            (Kind::DeathBirthNeighbourhood, false) => {
                self.run_jump::<R, DB_NEIGHBOURHOOD, false>(t, rng)
            }
            (_, true) => self.run_jump::<R, BD, true>(t, rng),
            (_, false) => self.run_jump::<R, BD, false>(t, rng),
        }
    }

    /// Runs a jump-chain replicate to its end, alternating between the event chain and
    /// leaped generations as the generation scheme's switch rule says (chain/leap.rs).
    fn run_jump_chain<R: Rng>(&mut self, t: &Tables, rng: &mut R) -> End {
        loop {
            if let Status::Done(end) = self.run_events(t, rng) {
                return end;
            }
            let status = loop {
                match self.leap_generation_any(t, rng) {
                    Status::Running => {}
                    other => break other,
                }
            };
            if let Status::Done(end) = status {
                return end;
            }
            self.refresh(t);
        }
    }

    /// Runs a fresh replicate of `model` (whose tables `t` are) to its end, drawing
    /// everything from `rng`.
    pub(crate) fn run<R: Rng>(
        &mut self,
        model: &Model,
        t: &Tables,
        rng: &mut R,
    ) -> ReplicateOutcome {
        debug_assert_eq!(model.demes(), t.demes(), "tables of another model");
        let start = t.draw_start(rng);
        self.reset(t, start);
        let end = if self.variants == t.total {
            End::Fixed
        } else {
            match (t.kind, t.wf_code) {
                (Kind::WrightFisher, DB_NEIGHBOURHOOD) => {
                    self.run_wright_fisher::<R, DB_NEIGHBOURHOOD>(t, rng)
                }
                (Kind::WrightFisher, _) => self.run_wright_fisher::<R, DB_DEME>(t, rng),
                _ => self.run_jump_chain(t, rng),
            }
        };
        self.outcome(end)
    }

    /// The outcome of a replicate that ended with `end`.
    fn outcome(&self, end: End) -> ReplicateOutcome {
        let arrivals = if end == End::Fixed {
            self.arrivals.clone()
        } else {
            Vec::new()
        };
        ReplicateOutcome {
            end,
            time: self.ticks,
            state_changes: self.changes,
            arrivals,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::migration::StochasticMatrix;
    use crate::population::Population;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    /// A sparse 4-deme matrix, reducible in places.
    fn sparse_four() -> Vec<Vec<f64>> {
        vec![
            vec![0.6, 0.4, 0.0, 0.0],
            vec![0.0, 0.5, 0.5, 0.0],
            vec![0.0, 0.0, 0.7, 0.3],
            vec![0.2, 0.0, 0.0, 0.8],
        ]
    }

    /// A dense asymmetric 3-deme matrix.
    fn dense_three() -> Vec<Vec<f64>> {
        vec![
            vec![0.5, 0.3, 0.2],
            vec![0.1, 0.6, 0.3],
            vec![0.25, 0.25, 0.5],
        ]
    }

    fn model(rule: Rule, scope: Scope, sizes: Vec<u64>, rows: &[Vec<f64>], s: f64) -> Model {
        let pop = Population::new(sizes).unwrap();
        let k = StochasticMatrix::from_weights(rows).unwrap();
        Model::new(&pop, k, rule, scope, s).unwrap()
    }

    fn check_against_model(model: &Model, rebuild_all: bool, seed: u64) {
        let mut t = Tables::new(
            model,
            Start::Deme(0),
            u64::MAX / 1024,
            &[0.5, 1.0],
            Stepping::Event,
        );
        t.rebuild_all = rebuild_all;
        t.refresh_every = u64::MAX; // test the incremental sums alone
        t.build_resident();
        let mut rep = Replicate::new(&t);
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let m = model.demes();
        let (mut up, mut down) = (vec![0.0; m], vec![0.0; m]);
        let mut checked = 0;
        for round in 0..150 {
            rep.reset(&t, round % m);
            loop {
                model.event_probabilities(&rep.k, &mut up, &mut down);
                let denom = match model.rule() {
                    Rule::BirthDeath => rep.denominator::<BD>(&t),
                    _ => rep.denominator::<DB_DEME>(&t),
                };
                for i in 0..m {
                    for (want, got) in [(up[i], rep.up(i) / denom), (down[i], rep.down(i) / denom)]
                    {
                        // a move that cannot happen must be exactly impossible
                        assert_eq!(want == 0.0, got == 0.0, "{:?} deme {i}", rep.k);
                        assert!(
                            (want - got).abs() <= 1e-12 * want.abs().max(1e-3),
                            "{:?} deme {i}: {want} vs {got}",
                            rep.k
                        );
                    }
                }
                checked += 1;
                if rep.jump_step_any(&t, &mut rng) != Status::Running {
                    break;
                }
            }
        }
        assert!(checked > 200, "trajectories too short: {checked}");
    }

    /// The small path (fixed-size arrays, capacity 6 for up to 6 demes) against the model.
    fn check_small_against_model(model: &Model, seed: u64) {
        let mut t = Tables::new(
            model,
            Start::Deme(0),
            u64::MAX / 1024,
            &[0.5, 1.0],
            Stepping::Event,
        );
        assert!(t.rebuild_all);
        t.refresh_every = 7; // exercise the refresh of the small path too
        let st = small::SmallTables::<6>::new(&t);
        let mut rep = Replicate::new(&t);
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let m = model.demes();
        let (mut up, mut down) = (vec![0.0; m], vec![0.0; m]);
        let mut checked = 0;
        for round in 0..150 {
            rep.reset(&t, round % m);
            let mut s = small::Small::<6>::load(&rep, &t);
            loop {
                let k = &s.k[..m];
                model.event_probabilities(k, &mut up, &mut down);
                let variants: u64 = k.iter().sum();
                let denom = match model.rule() {
                    Rule::BirthDeath => t.r * variants as f64 + (t.total - variants) as f64,
                    _ => t.totalf,
                };
                for i in 0..6 {
                    let (want_u, want_d) = if i < m { (up[i], down[i]) } else { (0.0, 0.0) };
                    for (want, got) in [(want_u, s.u[i] / denom), (want_d, s.d[i] / denom)] {
                        assert_eq!(want == 0.0, got == 0.0, "{k:?} deme {i}");
                        assert!(
                            (want - got).abs() <= 1e-12 * want.abs().max(1e-3),
                            "{k:?} deme {i}: {want} vs {got}"
                        );
                    }
                }
                checked += 1;
                let status = match t.code() {
                    DB_DEME => rep.small_step::<_, DB_DEME, 6>(&mut s, &st, &t, &mut rng),
                    DB_NEIGHBOURHOOD => {
                        rep.small_step::<_, DB_NEIGHBOURHOOD, 6>(&mut s, &st, &t, &mut rng)
                    }
                    _ => rep.small_step::<_, BD, 6>(&mut s, &st, &t, &mut rng),
                };
                if status != Status::Running {
                    break;
                }
            }
        }
        assert!(checked > 200, "trajectories too short: {checked}");
    }

    #[test]
    fn small_path_rates_equal_the_model_along_random_trajectories() {
        let (sparse, dense) = (sparse_four(), dense_three());
        let mut seed = 101;
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            for scope in [Scope::Deme, Scope::Neighbourhood] {
                for s in [0.3, -0.2] {
                    check_small_against_model(&model(rule, scope, vec![2, 3, 4], &dense, s), seed);
                    let b = model(rule, scope, vec![3, 1, 4, 2], &sparse, s);
                    check_small_against_model(&b, seed + 1);
                    seed += 2;
                }
            }
        }
    }

    #[test]
    fn incremental_rates_equal_the_model_along_random_trajectories() {
        let (sparse, dense) = (sparse_four(), dense_three());
        let mut seed = 1;
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            for scope in [Scope::Deme, Scope::Neighbourhood] {
                for s in [0.3, -0.2] {
                    for rebuild_all in [true, false] {
                        let a = model(rule, scope, vec![2, 3, 4], &dense, s);
                        check_against_model(&a, rebuild_all, seed);
                        let b = model(rule, scope, vec![3, 1, 4, 2], &sparse, s);
                        check_against_model(&b, rebuild_all, seed + 1);
                        seed += 2;
                    }
                }
            }
        }
    }

    #[test]
    fn wright_fisher_refill_equals_the_model_and_impossible_outcomes_are_exactly_zero() {
        let rows = sparse_four();
        let sizes = vec![3, 1, 4, 2];
        for scope in [Scope::Deme, Scope::Neighbourhood] {
            let model = model(Rule::WrightFisher, scope, sizes.clone(), &rows, 0.3);
            let t = Tables::new(&model, Start::Deme(0), 100, &[], Stepping::Generation);
            let mut rep = Replicate::new(&t);
            let mut want = vec![0.0; 4];
            // every count vector of the chain
            for code in 0..(4 * 2 * 5 * 3) {
                let mut c = code;
                for (i, &n) in sizes.iter().enumerate() {
                    rep.k[i] = c % (n + 1);
                    c /= n + 1;
                }
                let frozen = match scope {
                    Scope::Deme => rep.refill::<DB_DEME>(&t),
                    Scope::Neighbourhood => rep.refill::<DB_NEIGHBOURHOOD>(&t),
                };
                model.refill_probabilities(&rep.k, &mut want);
                for (i, &want) in want.iter().enumerate() {
                    let (p, q) = (rep.wf.p[i], rep.wf.q[i]);
                    assert!((p - want).abs() <= 1e-14, "{:?} {i}: {p} vs {want}", rep.k);
                    assert!((p + q - 1.0).abs() <= 1e-14);
                    // no variant sources: p exactly 0; no resident sources: q exactly 0
                    let sources: Vec<usize> = model.kernel().row(i).map(|(j, _)| j).collect();
                    assert_eq!(p == 0.0, sources.iter().all(|&j| rep.k[j] == 0));
                    assert_eq!(q == 0.0, sources.iter().all(|&j| rep.k[j] == sizes[j]));
                }
                let variants: u64 = rep.k.iter().sum();
                // this matrix is irreducible: only the absorbing states are frozen
                assert_eq!(frozen, variants == 0 || variants == 10, "{:?}", rep.k);
            }
        }
    }

    #[test]
    fn arrival_thresholds_are_read_with_tolerance() {
        assert_eq!(arrival_threshold(0.3, 10), 3);
        assert_eq!(arrival_threshold(0.31, 10), 4);
        assert_eq!(arrival_threshold(1.0, 7), 7);
        assert_eq!(arrival_threshold(0.01, 7), 1);
    }
}
