//! Preconditioners for BiCGSTAB on the event system, as faer `LinOp` / `Precond` operators.
//!
//! * [`Jacobi`]: multiply by `1 / diag(A)`.
//! * [`TwoLevel`]: damped Jacobi smoothing around an exact coarse correction on the total
//!   variant count `K = sum_i k_i`. Every event changes `K` by ±1, so the Galerkin coarse
//!   operator `P^T A P` (`P` = indicator of the states with total `K`) is tridiagonal of size
//!   `N - 1` and is solved exactly. The slowest mode of the chain, the drift of the overall
//!   variant frequency that takes of order `N^2` events, lives almost entirely in that coarse
//!   space; the smoother handles the faster within-count differences between demes. One
//!   application is: `z = w D^-1 r`; `z += P C^-1 P^T (r - A z)`; `z += w D^-1 (r - A z)`.

use super::assembly::EventSystem;
use super::space::StateSpace;
use faer::dyn_stack::{MemStack, StackReq};
use faer::matrix_free::{LinOp, Precond};
use faer::prelude::ReborrowMut;
use faer::{MatMut, MatRef, Par};
use rayon::prelude::*;
use std::sync::Mutex;

/// Applies `f(x_column, out_column)` to every column, copying when a column is not contiguous.
pub(crate) fn for_each_column(
    out: MatMut<'_, f64>,
    rhs: MatRef<'_, f64>,
    mut f: impl FnMut(&[f64], &mut [f64]),
) {
    let mut out = out;
    for j in 0..rhs.ncols() {
        let x: Vec<f64>;
        let x_slice = match rhs.col(j).try_as_col_major() {
            Some(col) => col.as_slice(),
            None => {
                x = rhs.col(j).iter().copied().collect();
                &x
            }
        };
        match out.rb_mut().col_mut(j).try_as_col_major_mut() {
            Some(col) => f(x_slice, col.as_slice_mut()),
            None => {
                let mut y = vec![0.0; out.nrows()];
                f(x_slice, &mut y);
                out.rb_mut()
                    .col_mut(j)
                    .iter_mut()
                    .zip(&y)
                    .for_each(|(o, &v)| *o = v);
            }
        }
    }
}

/// Implements the parts of `LinOp` shared by the real, square operators of this module.
macro_rules! square_real_op {
    ($ty:ty, $dim:expr) => {
        impl LinOp<f64> for $ty {
            fn apply_scratch(&self, _rhs_ncols: usize, _par: Par) -> StackReq {
                StackReq::EMPTY
            }

            fn nrows(&self) -> usize {
                $dim(self)
            }

            fn ncols(&self) -> usize {
                $dim(self)
            }

            fn apply(
                &self,
                out: MatMut<'_, f64>,
                rhs: MatRef<'_, f64>,
                par: Par,
                _stack: &mut MemStack,
            ) {
                for_each_column(out, rhs, |x, y| self.apply_vec(x, y, par));
            }

            fn conj_apply(
                &self,
                out: MatMut<'_, f64>,
                rhs: MatRef<'_, f64>,
                par: Par,
                stack: &mut MemStack,
            ) {
                // Real operator: the conjugate is the operator itself.
                self.apply(out, rhs, par, stack);
            }
        }
    };
}

/// `A` as a faer linear operator with a row-parallel product.
#[derive(Debug)]
pub(crate) struct SystemOperator<'a> {
    /// The system.
    pub(crate) system: &'a EventSystem,
}

impl SystemOperator<'_> {
    fn apply_vec(&self, x: &[f64], y: &mut [f64], par: Par) {
        match par {
            Par::Seq => self.system.apply_rows(0, x, y),
            _ => self.system.apply(x, y),
        }
    }
}

square_real_op!(SystemOperator<'_>, |s: &SystemOperator<'_>| s.system.dim());

/// Diagonal (Jacobi) preconditioner: multiplies by `1 / diag(A)`.
#[derive(Debug)]
pub(crate) struct Jacobi {
    inverse: Vec<f64>,
}

impl Jacobi {
    /// Inverse diagonal of `system`.
    pub(crate) fn new(system: &EventSystem) -> Self {
        Self {
            inverse: system.diag.iter().map(|d| 1.0 / d).collect(),
        }
    }

    fn apply_vec(&self, x: &[f64], y: &mut [f64], par: Par) {
        match par {
            Par::Seq => y
                .iter_mut()
                .zip(x.iter().zip(&self.inverse))
                .for_each(|(y, (x, d))| *y = x * d),
            _ => y
                .par_iter_mut()
                .zip(x.par_iter().zip(&self.inverse))
                .for_each(|(y, (x, d))| *y = x * d),
        }
    }
}

square_real_op!(Jacobi, |s: &Jacobi| s.inverse.len());
impl Precond<f64> for Jacobi {}

/// Damping of the Jacobi smoother. Every event changes the total count by one, so the jump
/// chain is bipartite and undamped Jacobi would leave the alternating mode untouched.
const DAMPING: f64 = 0.5;

/// Two-level preconditioner with a coarse space of total variant counts.
#[derive(Debug)]
pub(crate) struct TwoLevel<'a> {
    system: &'a EventSystem,
    jacobi: Jacobi,
    /// Total count `K - 1` of each unknown (coarse index).
    class: Vec<u32>,
    /// Tridiagonal coarse operator: sub-, main and super-diagonal.
    lower: Vec<f64>,
    main: Vec<f64>,
    upper: Vec<f64>,
    /// Work vector of one application (the solver applies the preconditioner sequentially).
    scratch: Mutex<Vec<f64>>,
}

impl<'a> TwoLevel<'a> {
    /// Builds the coarse operator `P^T A P` of `system` over `space`.
    pub(crate) fn new(system: &'a EventSystem, space: &StateSpace) -> Self {
        let n = system.dim();
        let total: u64 = space.sizes().iter().sum();
        let coarse = (total as usize).saturating_sub(1).max(1);
        let mut class = Vec::with_capacity(n);
        let mut k = vec![0u64; space.demes()];
        space.decode(1, &mut k);
        for _ in 0..n {
            let sum: u64 = k.iter().sum();
            class.push((sum - 1) as u32);
            space.advance(&mut k);
        }
        let (mut lower, mut main, mut upper) =
            (vec![0.0; coarse], vec![0.0; coarse], vec![0.0; coarse]);
        for row in 0..n {
            let c = class[row] as usize;
            main[c] += system.diag[row];
            let range = system.row_start[row]..system.row_start[row + 1];
            for (&col, &p) in system.col[range.clone()].iter().zip(&system.prob[range]) {
                let d = class[col as usize] as usize;
                if d < c {
                    lower[c] -= p;
                } else {
                    upper[c] -= p;
                }
            }
        }
        Self {
            system,
            jacobi: Jacobi::new(system),
            class,
            lower,
            main,
            upper,
            scratch: Mutex::new(vec![0.0; n]),
        }
    }

    /// Solves the tridiagonal coarse system in place (Thomas algorithm; the coarse matrix is
    /// row diagonally dominant, as `A` is).
    fn coarse_solve(&self, rhs: &mut [f64]) {
        let n = rhs.len();
        let mut c_prime = vec![0.0; n];
        let mut denom = self.main[0];
        c_prime[0] = self.upper[0] / denom;
        rhs[0] /= denom;
        for i in 1..n {
            denom = self.main[i] - self.lower[i] * c_prime[i - 1];
            c_prime[i] = self.upper[i] / denom;
            rhs[i] = (rhs[i] - self.lower[i] * rhs[i - 1]) / denom;
        }
        for i in (0..n.saturating_sub(1)).rev() {
            rhs[i] -= c_prime[i] * rhs[i + 1];
        }
    }

    fn apply_vec(&self, r: &[f64], z: &mut [f64], par: Par) {
        let mut guard = self.scratch.lock().unwrap_or_else(|e| e.into_inner());
        let residual = &mut guard[..];
        let parallel = !matches!(par, Par::Seq);
        // Pre-smoothing from zero.
        self.jacobi.apply_vec(r, z, par);
        scale(z, DAMPING, parallel);
        // Coarse correction: restrict the residual to total counts, solve, prolong.
        self.system.residual_into(z, r, residual, parallel);
        let mut coarse = self.restrict(residual, parallel);
        self.coarse_solve(&mut coarse);
        let prolong = |(i, v): (usize, &mut f64)| *v += coarse[self.class[i] as usize];
        if parallel {
            z.par_iter_mut().enumerate().for_each(prolong);
        } else {
            z.iter_mut().enumerate().for_each(prolong);
        }
        // Post-smoothing.
        self.system.residual_into(z, r, residual, parallel);
        let smooth = |((v, q), d): ((&mut f64, &f64), &f64)| *v += DAMPING * q * d;
        if parallel {
            z.par_iter_mut()
                .zip(residual.par_iter())
                .zip(self.jacobi.inverse.par_iter())
                .for_each(smooth);
        } else {
            z.iter_mut()
                .zip(residual.iter())
                .zip(&self.jacobi.inverse)
                .for_each(smooth);
        }
    }

    /// `P^T v`: sums of `v` over the states of each total count.
    fn restrict(&self, v: &[f64], parallel: bool) -> Vec<f64> {
        let size = self.main.len();
        let chunk_sum = |(chunk, values): (usize, &[f64])| {
            let mut out = vec![0.0; size];
            let first = chunk * RESTRICT_CHUNK;
            for (offset, &value) in values.iter().enumerate() {
                out[self.class[first + offset] as usize] += value;
            }
            out
        };
        let add = |mut a: Vec<f64>, b: Vec<f64>| {
            a.iter_mut().zip(&b).for_each(|(x, y)| *x += y);
            a
        };
        if parallel {
            v.par_chunks(RESTRICT_CHUNK)
                .enumerate()
                .map(chunk_sum)
                .reduce(|| vec![0.0; size], add)
        } else {
            v.chunks(RESTRICT_CHUNK)
                .enumerate()
                .map(chunk_sum)
                .fold(vec![0.0; size], add)
        }
    }
}

/// Unknowns per parallel task of the restriction.
const RESTRICT_CHUNK: usize = 16_384;

fn scale(v: &mut [f64], factor: f64, parallel: bool) {
    if parallel {
        v.par_iter_mut().for_each(|x| *x *= factor);
    } else {
        v.iter_mut().for_each(|x| *x *= factor);
    }
}

square_real_op!(TwoLevel<'_>, |s: &TwoLevel<'_>| s.system.dim());
impl Precond<f64> for TwoLevel<'_> {}
