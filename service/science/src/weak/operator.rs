//! The pair operator applied without forming it, and its deflated Krylov solve.
//!
//! Unknowns are the symmetric `m x m` matrix `Psi`, stored packed: column `j` of the lower
//! triangle (rows `j..m`) after column `j - 1`, which is also the order of the dense pair
//! system's unknowns. With `Phi` the matrix the recursion reads (`D ∘ Psi`, `D_lj = 1 - δ_lj/n_j`,
//! for death-birth and Wright-Fisher; `diag(n) Psi - Diag(Psi)` for birth-death), the forward
//! operator `L` and its adjoint `L*` for the Frobenius inner product on symmetric matrices are
//!
//! * death-birth: `L Psi = 2 Psi - B Phi - Phi B^T`, `L* Y = 2 Y - D ∘ (B^T Y + Y B)`;
//! * Wright-Fisher: `L Psi = Psi - B Phi B^T`, `L* Y = Y - D ∘ (B^T Y B)`;
//! * birth-death (`G = diag(1/n) F^T`, `T` the temperatures):
//!   `L Psi = T Psi + Psi T - G Phi - (G Phi)^T`, `L* Y = T Y + Y T - (W + W^T)` with
//!   `W_lj = (n_l - δ_lj) (F diag(1/n) Y)_lj`;
//!
//! and on a deme of one individual the diagonal unknown is fixed at zero (identity row, and
//! the entry is read as zero elsewhere). Each product walks the kernel's sparse rows and
//! columns once per column of `Psi`: `O(m nnz)` work, spread over columns with rayon; no
//! `m^2 x m^2` object exists.
//!
//! The dense pair matrix `A` (unknowns = packed entries, Euclidean inner product) is the
//! packed `L`; its transpose is `Ω A* Ω^-1`, where `A*` is the packed `L*` and `Ω` weighs
//! off-diagonal entries by 2. So `A^T y = c` is `A* (Ω^-1 y) = Ω^-1 c`.
//!
//! Two lineages meet only inside a deme, with probability about `1/n` per step, so `L` has
//! one eigenvalue of the order of the coalescence rate (tiny for large demes) with an
//! eigenvector close to `1 1^T` (`L`) or `v v^T` (`L*`, `v` the reproductive values per
//! deme). The solve removes that direction by deflation (the projection method of Nicolaides
//! 1987 and of Frank & Vuik 2001, from memory) and runs right-Jacobi-preconditioned BiCGSTAB
//! (van der Vorst 1992, from memory) on the rest, whose conditioning is that of migration
//! alone; the achieved residual of the original system is recomputed explicitly.

use crate::migration::StochasticMatrix;
use crate::model::Rule;
use rayon::prelude::*;

/// Start of packed column `j`.
pub(super) fn column_start(m: usize, j: usize) -> usize {
    j * m - j * j.saturating_sub(1) / 2
}

/// Number of packed entries.
pub(super) fn packed_len(m: usize) -> usize {
    m * (m + 1) / 2
}

/// Packed position of the unordered pair `(i, j)`.
pub(super) fn packed_index(m: usize, i: usize, j: usize) -> usize {
    let (lo, hi) = if i <= j { (i, j) } else { (j, i) };
    column_start(m, lo) + hi - lo
}

/// Splits a packed vector into its columns.
fn columns_mut(m: usize, packed: &mut [f64]) -> Vec<&mut [f64]> {
    let mut out = Vec::with_capacity(m);
    let mut rest = packed;
    for j in 0..m {
        let (head, tail) = rest.split_at_mut(m - j);
        out.push(head);
        rest = tail;
    }
    out
}

/// Columns per block of [`unpack`].
const BLOCK: usize = 64;

/// Writes the full column-major symmetric matrix of `packed` into `full` (`m * m`). Blocks of
/// output columns in parallel; every read and write runs along a packed or full column.
pub(super) fn unpack(m: usize, packed: &[f64], full: &mut [f64]) {
    full.par_chunks_mut(BLOCK * m)
        .enumerate()
        .for_each(|(b, chunk)| {
            let first = b * BLOCK;
            let width = chunk.len() / m;
            for w in 0..width {
                let i = first + w;
                let start = column_start(m, i);
                chunk[w * m + i..(w + 1) * m].copy_from_slice(&packed[start..start + m - i]);
            }
            // Rows j < i of column i: packed column j, rows first.. (contiguous in i).
            for j in 0..(first + width).min(m) {
                let start = column_start(m, j);
                for w in 0..width {
                    let i = first + w;
                    if j < i {
                        chunk[w * m + j] = packed[start + i - j];
                    }
                }
            }
        });
}

/// Which operator to apply.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Direction {
    /// `L` (the dense pair matrix `A`).
    Forward,
    /// `L*` (`Ω^-1 A^T Ω`).
    Adjoint,
}

/// The pair operator of one model.
#[derive(Debug)]
pub(super) struct PairOperator<'a> {
    rule: Rule,
    kernel: &'a StochasticMatrix,
    n: &'a [f64],
    temperature: &'a [f64],
    masked: &'a [bool],
}

/// Fixed-size chunks for deterministic parallel reductions.
const CHUNK: usize = 1 << 14;

fn dot(a: &[f64], b: &[f64]) -> f64 {
    let parts: Vec<f64> = a
        .par_chunks(CHUNK)
        .zip(b.par_chunks(CHUNK))
        .map(|(x, y)| x.iter().zip(y).map(|(p, q)| p * q).sum::<f64>())
        .collect();
    parts.iter().sum()
}

fn norm(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}

/// `y += alpha x`.
fn axpy(alpha: f64, x: &[f64], y: &mut [f64]) {
    y.par_chunks_mut(CHUNK)
        .zip(x.par_chunks(CHUNK))
        .for_each(|(y, x)| y.iter_mut().zip(x).for_each(|(y, x)| *y += alpha * x));
}

impl<'a> PairOperator<'a> {
    /// The operator of `rule` on `kernel` (`B` or `F`) with sizes `n`, temperatures (birth-death
    /// only, else empty) and the demes of one individual.
    pub(super) fn new(
        rule: Rule,
        kernel: &'a StochasticMatrix,
        n: &'a [f64],
        temperature: &'a [f64],
        masked: &'a [bool],
    ) -> Self {
        Self {
            rule,
            kernel,
            n,
            temperature,
            masked,
        }
    }

    fn m(&self) -> usize {
        self.n.len()
    }

    /// `1 - δ_ij / n_j`.
    fn other(&self, i: usize, j: usize) -> f64 {
        if i == j {
            1.0 - 1.0 / self.n[j]
        } else {
            1.0
        }
    }

    /// Diagonal of `A` (equal to that of `A*`), packed.
    pub(super) fn diagonal(&self) -> Vec<f64> {
        let m = self.m();
        let k = |i: usize, j: usize| self.kernel.get(i, j);
        let mut d = vec![0.0; packed_len(m)];
        for (j, col) in columns_mut(m, &mut d).into_iter().enumerate() {
            for (offset, x) in col.iter_mut().enumerate() {
                let i = j + offset;
                *x = if i == j && self.masked[j] {
                    1.0
                } else {
                    match self.rule {
                        Rule::DeathBirth => {
                            2.0 - k(i, i) * self.other(i, j) - k(j, j) * self.other(j, i)
                        }
                        Rule::WrightFisher => {
                            let swap = if i == j { 0.0 } else { k(i, j) * k(j, i) };
                            1.0 - k(i, i) * k(j, j) * self.other(i, j) - swap
                        }
                        Rule::BirthDeath => {
                            let same = if i == j { 1.0 } else { 0.0 };
                            self.temperature[i] + self.temperature[j]
                                - k(i, i) * (self.n[i] - same) / self.n[i]
                                - k(j, j) * (self.n[j] - same) / self.n[j]
                        }
                    }
                };
            }
        }
        d
    }

    /// `out = L x` or `L* x` (packed), using `full` (`m * m`) as scratch.
    pub(super) fn apply(&self, direction: Direction, x: &[f64], out: &mut [f64], full: &mut [f64]) {
        let m = self.m();
        unpack(m, x, full);
        for j in 0..m {
            let d = &mut full[j * m + j];
            if self.masked[j] {
                *d = 0.0;
            } else if direction == Direction::Forward && self.rule != Rule::BirthDeath {
                *d *= 1.0 - 1.0 / self.n[j];
            }
        }
        let full: &[f64] = full;
        let col = |l: usize| &full[l * m..(l + 1) * m];
        let kernel = self.kernel;
        let n = self.n;
        let t = self.temperature;
        columns_mut(m, out)
            .into_par_iter()
            .enumerate()
            .for_each_init(
                || vec![0.0; m],
                |v, (j, out)| {
                    let xj = &x[column_start(m, j)..column_start(m, j) + m - j];
                    v.iter_mut().for_each(|e| *e = 0.0);
                    match (self.rule, direction) {
                        (Rule::DeathBirth, Direction::Forward) => {
                            // (Phi B^T)[:, j] = sum_{l in row j} B_jl Phi[:, l]
                            for (l, b) in kernel.row(j) {
                                add_scaled(b, &col(l)[j..], &mut v[j..]);
                            }
                            for (o, i) in (j..m).enumerate() {
                                let gather: f64 = kernel.row(i).map(|(l, b)| b * col(j)[l]).sum();
                                out[o] = 2.0 * xj[o] - gather - v[i];
                            }
                        }
                        (Rule::DeathBirth, Direction::Adjoint) => {
                            // (Y B)[:, j] = sum_{r in col j} B_rj Y[:, r]
                            for (r, b) in kernel.col(j) {
                                add_scaled(b, &col(r)[j..], &mut v[j..]);
                            }
                            for (o, i) in (j..m).enumerate() {
                                let gather: f64 = kernel.col(i).map(|(r, b)| b * col(j)[r]).sum();
                                out[o] = 2.0 * xj[o] - self.other(i, j) * (gather + v[i]);
                            }
                        }
                        (Rule::WrightFisher, Direction::Forward) => {
                            for (l, b) in kernel.row(j) {
                                add_scaled(b, col(l), v);
                            }
                            for (o, i) in (j..m).enumerate() {
                                let gather: f64 = kernel.row(i).map(|(l, b)| b * v[l]).sum();
                                out[o] = xj[o] - gather;
                            }
                        }
                        (Rule::WrightFisher, Direction::Adjoint) => {
                            for (r, b) in kernel.col(j) {
                                add_scaled(b, col(r), v);
                            }
                            for (o, i) in (j..m).enumerate() {
                                let gather: f64 = kernel.col(i).map(|(r, b)| b * v[r]).sum();
                                out[o] = xj[o] - self.other(i, j) * gather;
                            }
                        }
                        (Rule::BirthDeath, Direction::Forward) => {
                            // (G Phi)_ji = (1/n_j) sum_{l in col j} F_lj (n_l Psi_li - δ_li Psi_ii)
                            for (l, f) in kernel.col(j) {
                                add_scaled(f * n[l], &col(l)[j..], &mut v[j..]);
                                if l >= j {
                                    v[l] -= f * col(l)[l];
                                }
                            }
                            let psi_jj = col(j)[j];
                            for (o, i) in (j..m).enumerate() {
                                // (G Phi)_ij = (1/n_i) sum_{l in col i} F_li (n_l Psi_lj - δ_lj Psi_jj)
                                let gather: f64 = kernel
                                    .col(i)
                                    .map(|(l, f)| {
                                        let phi =
                                            n[l] * col(j)[l] - if l == j { psi_jj } else { 0.0 };
                                        f * phi
                                    })
                                    .sum();
                                out[o] = (t[i] + t[j]) * xj[o] - gather / n[i] - v[i] / n[j];
                            }
                        }
                        (Rule::BirthDeath, Direction::Adjoint) => {
                            // (Y diag(1/n) F^T)[:, j] = sum_{i in row j} (F_ji / n_i) Y[:, i]
                            for (i, f) in kernel.row(j) {
                                add_scaled(f / n[i], &col(i)[j..], &mut v[j..]);
                            }
                            for (o, l) in (j..m).enumerate() {
                                let gather: f64 =
                                    kernel.row(l).map(|(i, f)| f * col(j)[i] / n[i]).sum();
                                let same = if l == j { 1.0 } else { 0.0 };
                                out[o] = (t[l] + t[j]) * xj[o]
                                    - (n[l] - same) * gather
                                    - (n[j] - same) * v[l];
                            }
                        }
                    }
                    if self.masked[j] {
                        out[0] = xj[0];
                    }
                },
            );
    }
}

fn add_scaled(alpha: f64, x: &[f64], y: &mut [f64]) {
    y.iter_mut().zip(x).for_each(|(y, x)| *y += alpha * x);
}

/// Result of a deflated Krylov solve.
#[derive(Debug, Clone)]
pub(super) struct KrylovOutcome {
    /// The solution (packed).
    pub(super) x: Vec<f64>,
    /// Achieved `||rhs - A x||_inf / ||rhs||_inf`, recomputed from an explicit product.
    pub(super) residual: f64,
    /// BiCGSTAB iterations over all passes.
    pub(super) iterations: usize,
}

/// Solves `op x = rhs` (in `direction`) by BiCGSTAB with right Jacobi preconditioning on the
/// system deflated by the coarse direction `z` (right) and `w` (left): with `E = w·Az` and
/// `P = I - Az w^T / E`, it solves `P A x~ = P rhs` and sets `x = x~ + z (w·rhs - w·A x~) / E`.
/// Restarts from the explicit residual until `target` is met, progress stalls or `max_iter`
/// iterations are spent. `None` when the deflated system is degenerate.
pub(super) fn solve_deflated(
    op: &PairOperator<'_>,
    direction: Direction,
    rhs: &[f64],
    z: &[f64],
    w: &[f64],
    target: f64,
    max_iter: usize,
) -> Option<KrylovOutcome> {
    let m = op.m();
    let len = packed_len(m);
    let mut full = vec![0.0; m * m];
    let inverse: Vec<f64> = op
        .diagonal()
        .iter()
        .map(|&d| if d.abs() > 1e-300 { 1.0 / d } else { 1.0 })
        .collect();
    let mut az = vec![0.0; len];
    op.apply(direction, z, &mut az, &mut full);
    let e = dot(w, &az);
    if !(e.is_finite() && e != 0.0) {
        return None;
    }
    let rhs_scale = rhs.iter().fold(0.0f64, |a, v| a.max(v.abs()));
    let mut x = vec![0.0; len];
    if rhs_scale == 0.0 {
        return Some(KrylovOutcome {
            x,
            residual: 0.0,
            iterations: 0,
        });
    }
    let mut residual = rhs.to_vec();
    let mut relative = 1.0;
    let mut iterations = 0;
    let mut scratch = Scratch::new(len);
    for _pass in 0..6 {
        let used = scratch.bicgstab(
            op,
            direction,
            &residual,
            &inverse,
            &az,
            w,
            e,
            target * 0.1,
            max_iter.saturating_sub(iterations),
            &mut full,
        );
        iterations += used;
        // x~ = J u; correction = x~ + z (w·r - w·A x~) / E.
        let correction = &mut scratch.u;
        correction
            .par_iter_mut()
            .zip(inverse.par_iter())
            .for_each(|(u, d)| *u *= d);
        op.apply(direction, correction, &mut scratch.t, &mut full);
        let coarse = (dot(w, &residual) - dot(w, &scratch.t)) / e;
        axpy(coarse, z, correction);
        axpy(1.0, correction, &mut x);
        // Explicit residual of the original system.
        op.apply(direction, &x, &mut scratch.t, &mut full);
        residual
            .par_iter_mut()
            .zip(rhs.par_iter().zip(scratch.t.par_iter()))
            .for_each(|(r, (b, ax))| *r = b - ax);
        let worst = residual.iter().fold(0.0f64, |a, v| a.max(v.abs()));
        let now = worst / rhs_scale;
        if !now.is_finite() {
            return None;
        }
        let stalled = now > 0.5 * relative;
        relative = now;
        if relative <= target || stalled || iterations >= max_iter {
            break;
        }
    }
    Some(KrylovOutcome {
        x,
        residual: relative,
        iterations,
    })
}

/// Work vectors of BiCGSTAB.
struct Scratch {
    u: Vec<f64>,
    r: Vec<f64>,
    rhat: Vec<f64>,
    p: Vec<f64>,
    v: Vec<f64>,
    t: Vec<f64>,
    jp: Vec<f64>,
}

impl Scratch {
    fn new(len: usize) -> Self {
        let zero = || vec![0.0; len];
        Self {
            u: zero(),
            r: zero(),
            rhat: zero(),
            p: zero(),
            v: zero(),
            t: zero(),
            jp: zero(),
        }
    }

    /// `out = P A J x`.
    #[allow(clippy::too_many_arguments)]
    fn deflated_product(
        op: &PairOperator<'_>,
        direction: Direction,
        x: &[f64],
        out: &mut [f64],
        jp: &mut [f64],
        inverse: &[f64],
        az: &[f64],
        w: &[f64],
        e: f64,
        full: &mut [f64],
    ) {
        jp.par_iter_mut()
            .zip(x.par_iter().zip(inverse.par_iter()))
            .for_each(|(o, (x, d))| *o = x * d);
        op.apply(direction, jp, out, full);
        let coef = dot(w, out) / e;
        axpy(-coef, az, out);
    }

    /// BiCGSTAB on `P A J u = P b` from `u = 0`; leaves `u` in `self.u`, returns iterations.
    #[allow(clippy::too_many_arguments)]
    fn bicgstab(
        &mut self,
        op: &PairOperator<'_>,
        direction: Direction,
        b: &[f64],
        inverse: &[f64],
        az: &[f64],
        w: &[f64],
        e: f64,
        tolerance: f64,
        max_iter: usize,
        full: &mut [f64],
    ) -> usize {
        self.u.iter_mut().for_each(|x| *x = 0.0);
        self.p.iter_mut().for_each(|x| *x = 0.0);
        self.v.iter_mut().for_each(|x| *x = 0.0);
        self.r.copy_from_slice(b);
        let coef = dot(w, &self.r) / e;
        axpy(-coef, az, &mut self.r);
        self.rhat.copy_from_slice(&self.r);
        let b_norm = norm(&self.r);
        if b_norm == 0.0 {
            return 0;
        }
        let (mut rho, mut alpha, mut omega) = (1.0, 1.0, 1.0);
        for it in 0..max_iter {
            let rho_new = dot(&self.rhat, &self.r);
            if rho_new == 0.0 || !rho_new.is_finite() {
                return it;
            }
            let beta = (rho_new / rho) * (alpha / omega);
            self.p
                .par_iter_mut()
                .zip(self.r.par_iter().zip(self.v.par_iter()))
                .for_each(|(p, (r, v))| *p = r + beta * (*p - omega * v));
            Self::deflated_product(
                op,
                direction,
                &self.p,
                &mut self.v,
                &mut self.jp,
                inverse,
                az,
                w,
                e,
                full,
            );
            let denominator = dot(&self.rhat, &self.v);
            if denominator == 0.0 || !denominator.is_finite() {
                return it;
            }
            alpha = rho_new / denominator;
            // r <- s = r - alpha v
            axpy(-alpha, &self.v, &mut self.r);
            if norm(&self.r) <= tolerance * b_norm {
                axpy(alpha, &self.p, &mut self.u);
                return it + 1;
            }
            Self::deflated_product(
                op,
                direction,
                &self.r,
                &mut self.t,
                &mut self.jp,
                inverse,
                az,
                w,
                e,
                full,
            );
            let tt = dot(&self.t, &self.t);
            if tt == 0.0 {
                axpy(alpha, &self.p, &mut self.u);
                return it + 1;
            }
            omega = dot(&self.t, &self.r) / tt;
            self.u
                .par_iter_mut()
                .zip(self.p.par_iter().zip(self.r.par_iter()))
                .for_each(|(u, (p, s))| *u += alpha * p + omega * s);
            axpy(-omega, &self.t, &mut self.r);
            rho = rho_new;
            if norm(&self.r) <= tolerance * b_norm || omega == 0.0 {
                return it + 1;
            }
        }
        max_iter
    }
}
