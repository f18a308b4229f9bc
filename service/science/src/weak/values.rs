//! Reproductive values from a sparse bordered system, and the solves their derivatives need.
//!
//! * death-birth, Wright-Fisher: `M = [[I - B, 1], [1^T, 0]]`, `M^T [nu; μ] = [0; 1]`
//!   (`nu B = nu`, `sum nu = 1`, `μ = 0`);
//! * birth-death: `M = [[T - F, n'], [n'^T, 0]]` with `n' = n / max n`,
//!   `M [w; λ] = [0; 1 / max n]` (`T w = F w`, `n · w = 1`, `λ = 0`).
//!
//! Both are non-singular exactly when the reproductive value is unique. For a weight `h`,
//! `h · ∂v` over a kernel entry is read off the solution of the other-sided system with
//! right-hand side `[h; 0]` (see [`Bordered::sensitivity`]).

use super::WeakError;
use crate::model::{Model, Rule};
use faer::prelude::*;
use faer::sparse::linalg::solvers::Lu;
use faer::sparse::{SparseColMat, Triplet};
use faer::Mat;

/// Relative residual above which a bordered solve counts as singular.
const RESIDUAL_LIMIT: f64 = 1e-10;

/// The factorised bordered matrix of one model.
pub(super) struct Bordered {
    m: usize,
    /// Last entry of the right-hand side of the values' system.
    normalisation: f64,
    /// `true` for death-birth and Wright-Fisher (values from the transposed system).
    recruitment: bool,
    entries: Vec<(usize, usize, f64)>,
    lu: Lu<usize, f64>,
}

impl Bordered {
    /// Builds and factorises `M` for `model` (`temperature` used for birth-death only).
    pub(super) fn new(model: &Model, temperature: &[f64]) -> Result<Self, WeakError> {
        let m = model.demes();
        let kernel = model.kernel();
        let recruitment = model.rule() != Rule::BirthDeath;
        let mut entries = Vec::with_capacity(kernel.nnz() + 3 * m);
        // Birth-death border n / max n (so the border is of the kernel's order of magnitude);
        // the normalisation becomes (n / max n) · w = 1 / max n.
        let largest = model.sizes().iter().copied().max().unwrap_or(1) as f64;
        for (i, &size) in model.sizes().iter().enumerate() {
            let diagonal = if recruitment { 1.0 } else { temperature[i] };
            entries.push((i, i, diagonal));
            for (j, k) in kernel.row(i) {
                entries.push((i, j, -k));
            }
            let border = if recruitment {
                1.0
            } else {
                size as f64 / largest
            };
            entries.push((i, m, border));
            entries.push((m, i, border));
        }
        let triplets: Vec<Triplet<usize, usize, f64>> = entries
            .iter()
            .map(|&(row, col, val)| Triplet { row, col, val })
            .collect();
        let matrix = SparseColMat::<usize, f64>::try_new_from_triplets(m + 1, m + 1, &triplets)
            .map_err(|_| WeakError::Singular)?;
        let lu = matrix.sp_lu().map_err(|_| WeakError::Singular)?;
        Ok(Self {
            m,
            normalisation: if recruitment { 1.0 } else { 1.0 / largest },
            recruitment,
            entries,
            lu,
        })
    }

    /// Solves `M x = b` (or `M^T x = b`), checking the residual.
    fn solve(&self, b: &[f64], transpose: bool) -> Result<Vec<f64>, WeakError> {
        let size = self.m + 1;
        let rhs = Mat::<f64>::from_fn(size, 1, |i, _| b[i]);
        let x = if transpose {
            self.lu.solve_transpose(&rhs)
        } else {
            self.lu.solve(&rhs)
        };
        let x: Vec<f64> = (0..size).map(|i| x[(i, 0)]).collect();
        if x.iter().any(|v| !v.is_finite()) {
            return Err(WeakError::Singular);
        }
        let mut r = b.to_vec();
        for &(i, j, v) in &self.entries {
            if transpose {
                r[j] -= v * x[i];
            } else {
                r[i] -= v * x[j];
            }
        }
        let scale = b.iter().fold(0.0f64, |a, v| a.max(v.abs()));
        let worst = r.iter().fold(0.0f64, |a, v| a.max(v.abs()));
        if scale > 0.0 && worst / scale > RESIDUAL_LIMIT {
            return Err(WeakError::Singular);
        }
        Ok(x)
    }

    /// `nu` (death-birth, Wright-Fisher) or `w` (birth-death).
    pub(super) fn values(&self) -> Result<Vec<f64>, WeakError> {
        let mut e = vec![0.0; self.m + 1];
        e[self.m] = self.normalisation;
        let mut x = self.solve(&e, self.recruitment)?;
        x.truncate(self.m);
        Ok(x)
    }

    /// The vector `g` with `h · ∂v = nu_a g_b` over `B_ab` (death-birth, Wright-Fisher:
    /// `M [g; λ] = [h; 0]`) or `h · ∂w = w_b (g_a - (n_a/n_b) g_b)` over `F_ab` (birth-death:
    /// `M^T [g; μ] = [h; 0]`).
    pub(super) fn sensitivity(&self, h: &[f64]) -> Result<Vec<f64>, WeakError> {
        let mut b = h.to_vec();
        b.push(0.0);
        let mut x = self.solve(&b, !self.recruitment)?;
        x.truncate(self.m);
        Ok(x)
    }
}
