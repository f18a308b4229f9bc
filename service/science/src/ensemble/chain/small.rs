//! The small path of the jump chain: at most [`SMALL_MAX_DEMES`] demes, every per-deme
//! quantity in a fixed-size array on the stack (capacity `C`, `m` rounded up to even, padded with
//! demes of size 0 whose rates are exactly 0), so that the fused update over all targets and
//! the linear scan that picks the change run over arrays of a length known at compile time,
//! with no bounds checks and no heap access. The arithmetic is that of the dense path
//! ([`Dense`]): the same sums in the same order, so both paths give the same rates.

// the loops index several parallel arrays of the same compile-time length at once
#![allow(clippy::needless_range_loop)]

use super::{
    as_f64, draw_wait, hands_over, rates_padded, target_sums, End, Replicate, Status, Tables, BD,
    DB_DEME, DB_NEIGHBOURHOOD,
};
use rand::Rng;

/// Largest number of demes run on the small path.
pub const SMALL_MAX_DEMES: usize = 16;

/// Read-only arrays of the small path, padded to capacity `C`.
#[derive(Debug, Clone)]
pub(crate) struct SmallTables<const C: usize> {
    /// `w[j][i] = w_ij`: the targets of source `j`, zeros included.
    w: [[f64; C]; C],
    n: [u64; C],
    nf: [f64; C],
    inv_n: [f64; C],
    /// 1 for a padding deme, 0 for a real one (see [`rates_padded`]).
    pad: [f64; C],
    r: f64,
}

impl<const C: usize> SmallTables<C> {
    pub(crate) fn new(t: &Tables) -> Self {
        let m = t.demes();
        assert!(m <= C, "{m} demes in capacity {C}");
        let mut w = [[0.0; C]; C];
        for (j, row) in w.iter_mut().enumerate().take(m) {
            row[..m].copy_from_slice(&t.wcol[j * m..(j + 1) * m]);
        }
        let mut s = Self {
            w,
            n: [0; C],
            nf: [0.0; C],
            inv_n: [0.0; C],
            pad: [1.0; C],
            r: t.r,
        };
        s.n[..m].copy_from_slice(&t.n);
        s.nf[..m].copy_from_slice(&t.nf);
        s.inv_n[..m].copy_from_slice(&t.inv_n);
        s.pad[..m].iter_mut().for_each(|x| *x = 0.0);
        s
    }
}

/// The per-deme state of one replicate on the small path.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Small<const C: usize> {
    pub(crate) k: [u64; C],
    kf: [f64; C],
    a: [f64; C],
    c: [f64; C],
    p: [f64; C],
    q: [f64; C],
    nv: [u32; C],
    nr: [u32; C],
    pub(crate) u: [f64; C],
    pub(crate) d: [f64; C],
    s: [f64; C],
    total: f64,
    variants: u64,
    /// The next arrival threshold of each deme (`u64::MAX` when none is left).
    next_thr: [u64; C],
}

/// Sum of `x` in four interleaved partial sums (a short dependency chain). Any order will
/// do: [`Small::pick`] sends a point that rounding pushed past the end to the last positive
/// rate.
#[inline(always)]
fn sum<const C: usize>(x: &[f64; C]) -> f64 {
    if C < 4 {
        return x.iter().sum();
    }
    let mut acc = [0.0; 4];
    let chunks = x.chunks_exact(4);
    let rest = chunks.remainder();
    for chunk in chunks {
        for l in 0..4 {
            acc[l] += chunk[l];
        }
    }
    let mut total = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    for &r in rest {
        total += r;
    }
    total
}

impl<const C: usize> Small<C> {
    /// The state of `rep` (reset, on the dense path) copied into fixed-size arrays.
    pub(crate) fn load(rep: &Replicate, t: &Tables) -> Self {
        let m = t.demes();
        let mut s = Self {
            k: [0; C],
            kf: [0.0; C],
            a: [0.0; C],
            c: [0.0; C],
            p: [0.0; C],
            q: [0.0; C],
            nv: [0; C],
            nr: [0; C],
            u: [0.0; C],
            d: [0.0; C],
            s: [0.0; C],
            total: 0.0,
            variants: rep.variants,
            next_thr: [u64::MAX; C],
        };
        let dense = &rep.dense;
        s.k[..m].copy_from_slice(&rep.k);
        s.kf[..m].copy_from_slice(&dense.kf);
        s.a[..m].copy_from_slice(&dense.a);
        s.c[..m].copy_from_slice(&dense.c);
        s.p[..m].copy_from_slice(&dense.p);
        s.q[..m].copy_from_slice(&dense.q);
        s.nv[..m].copy_from_slice(&dense.nv);
        s.nr[..m].copy_from_slice(&dense.nr);
        s.u[..m].copy_from_slice(&dense.u);
        s.d[..m].copy_from_slice(&dense.d);
        s.s[..m].copy_from_slice(&dense.s);
        s.total = sum(&s.s);
        for i in 0..m {
            s.next_thr[i] = next_threshold(t, rep.next_arrival[i], i);
        }
        s
    }

    /// Rewrites every sum and rate after `(a_j, c_j)` changed by `(da, dc)`; see
    /// [`super::Dense::update`].
    #[inline(always)]
    fn update<const K: u8, const ZERO: bool>(
        &mut self,
        st: &SmallTables<C>,
        j: usize,
        da: f64,
        dc: f64,
    ) {
        let w = &st.w[j];
        for i in 0..C {
            let mut pi = self.p[i] + w[i] * da;
            let mut qi = self.q[i] + w[i] * dc;
            if ZERO {
                if self.nv[i] == 0 {
                    pi = 0.0;
                }
                if self.nr[i] == 0 {
                    qi = 0.0;
                }
            }
            self.p[i] = pi;
            self.q[i] = qi;
            let kf = self.kf[i];
            let (ui, di) = rates_padded::<K>(pi, qi, st.nf[i] - kf, kf, st.inv_n[i], st.pad[i]);
            self.u[i] = ui;
            self.d[i] = di;
            self.s[i] = ui + di;
        }
        self.total = sum(&self.s);
    }

    /// Applies `k_j -> k_j +- 1`; returns whether `k_j` reached its next arrival threshold.
    #[inline(always)]
    fn apply<const K: u8>(&mut self, t: &Tables, st: &SmallTables<C>, j: usize, up: bool) -> bool {
        let j = j.min(C - 1);
        let nj = st.n[j];
        let (dv, dr): (i32, i32) = if up {
            self.k[j] += 1;
            self.variants += 1;
            (i32::from(self.k[j] == 1), -i32::from(self.k[j] == nj))
        } else {
            self.k[j] -= 1;
            self.variants -= 1;
            (-i32::from(self.k[j] == 0), i32::from(self.k[j] == nj - 1))
        };
        let kj = self.k[j];
        let kf = as_f64(kj);
        self.kf[j] = kf;
        // the source values of `Tables::source_values`, from the same integers
        let mutant = st.r * kf;
        let resident = as_f64(nj - kj);
        let (a, c) = match K {
            DB_DEME => {
                let w = mutant + resident;
                (mutant / w, resident / w)
            }
            DB_NEIGHBOURHOOD => (mutant * st.inv_n[j], resident * st.inv_n[j]),
            _ => (mutant, resident),
        };
        let da = a - self.a[j];
        let dc = c - self.c[j];
        self.a[j] = a;
        self.c[j] = c;
        if dv != 0 || dr != 0 {
            let line = t.infl_start[j]..t.infl_start[j + 1];
            for &i in &t.infl_target[line] {
                let i = i.min(C - 1);
                self.nv[i] = self.nv[i].wrapping_add_signed(dv);
                self.nr[i] = self.nr[i].wrapping_add_signed(dr);
            }
            self.update::<K, true>(st, j, da, dc);
        } else {
            self.update::<K, false>(st, j, da, dc);
        }
        up && kj >= self.next_thr[j]
    }

    /// See [`super::Dense::pick`].
    #[inline(always)]
    fn pick(&self, mut v: f64) -> (usize, bool) {
        for i in 0..C {
            let si = self.s[i];
            if v < si {
                return (i, v < self.u[i] || self.d[i] == 0.0);
            }
            v -= si;
        }
        let i = self
            .s
            .iter()
            .rposition(|&x| x > 0.0)
            .expect("a positive total has a positive rate");
        (i, self.d[i] == 0.0)
    }

    /// Rebuilds every sum, count and rate from the counts.
    fn refresh<const K: u8>(&mut self, t: &Tables, st: &SmallTables<C>) {
        let m = t.demes();
        for j in 0..m {
            let (a, c) = t.source_values::<K>(j, self.k[j]);
            self.a[j] = a;
            self.c[j] = c;
            self.kf[j] = as_f64(self.k[j]);
        }
        for i in 0..m {
            let (p, q, nv, nr) = target_sums(t, &self.k[..m], i, &self.a[..m], &self.c[..m]);
            self.p[i] = p;
            self.q[i] = q;
            self.nv[i] = nv;
            self.nr[i] = nr;
        }
        for i in 0..C {
            let kf = self.kf[i];
            let (ui, di) = rates_padded::<K>(
                self.p[i],
                self.q[i],
                st.nf[i] - kf,
                kf,
                st.inv_n[i],
                st.pad[i],
            );
            self.u[i] = ui;
            self.d[i] = di;
            self.s[i] = ui + di;
        }
        self.total = sum(&self.s);
    }
}

/// Threshold at position `at` of deme `i`'s arrival list, `u64::MAX` past its end.
fn next_threshold(t: &Tables, at: usize, i: usize) -> u64 {
    if at < t.arr_start[i + 1] {
        t.arr_thr[at]
    } else {
        u64::MAX
    }
}

impl Replicate {
    /// One state change on the small path (the counterpart of [`Replicate::jump_step`]).
    #[inline(always)]
    pub(crate) fn small_step<R: Rng, const K: u8, const C: usize>(
        &mut self,
        s: &mut Small<C>,
        st: &SmallTables<C>,
        t: &Tables,
        rng: &mut R,
    ) -> Status {
        let total = s.total;
        if total <= 0.0 {
            // no event can change a non-absorbing state: frozen
            self.ticks = self.last_change;
            return Status::Done(End::Lost);
        }
        let (denom, lambda) = match K {
            BD => {
                let w = st.r * as_f64(s.variants) + as_f64(t.total - s.variants);
                (w, total / w)
            }
            _ => (t.totalf, total * t.inv_total),
        };
        let (wait, v) = draw_wait(rng, total, denom, lambda);
        self.ticks = self.ticks.saturating_add(wait);
        if self.ticks > t.max_ticks {
            self.ticks = t.max_ticks;
            return Status::Done(End::Unresolved);
        }
        let (j, up) = s.pick(v);
        let j = j.min(C - 1);
        if s.apply::<K>(t, st, j, up) {
            self.k[j] = s.k[j];
            self.record_arrivals(t, j);
            s.next_thr[j] = next_threshold(t, self.next_arrival[j], j);
        }
        self.changes += 1;
        self.last_change = self.ticks;
        if s.variants == 0 {
            return Status::Done(End::Lost);
        }
        if s.variants == t.total {
            return Status::Done(End::Fixed);
        }
        self.since_refresh += 1;
        if self.since_refresh >= t.refresh_every {
            self.since_refresh = 0;
            s.refresh::<K>(t, st);
        }
        if hands_over(s.k[j], st.n[j], t.leap_from) {
            return Status::Switch;
        }
        Status::Running
    }

    /// Runs a replicate (its dense path state built from the counts) on the small path until
    /// it ends or hands over to the generation scheme; the counts are copied back.
    pub(crate) fn run_small<R: Rng, const K: u8, const C: usize>(
        &mut self,
        t: &Tables,
        rng: &mut R,
    ) -> Status {
        let st = SmallTables::<C>::new(t);
        let mut s = Small::<C>::load(self, t);
        let status = loop {
            match self.small_step::<R, K, C>(&mut s, &st, t, rng) {
                Status::Running => {}
                other => break other,
            }
        };
        self.finish_small(&s, t);
        status
    }

    /// Copies the counts of a replicate's small-path state back.
    pub(crate) fn finish_small<const C: usize>(&mut self, s: &Small<C>, t: &Tables) {
        let m = t.demes();
        self.k.copy_from_slice(&s.k[..m]);
        self.variants = s.variants;
    }
}
