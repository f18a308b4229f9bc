//! Sparse LU of a square system given as triplets, with plain and transposed solves.

use faer::prelude::Solve;
use faer::sparse::linalg::solvers::Lu;
use faer::sparse::{SparseColMat, Triplet};
use faer::Mat;

/// Largest system solved by sparse LU; above it restarted GMRES is tried first (random sparse
/// kernels fill in: at 2,000 demes with 8 nonzeros per row one LU took 0.7 s on 2 cores,
/// against a few milliseconds for GMRES).
pub(crate) const DIRECT_MAX: usize = 300;

/// GMRES restart length.
const RESTART: usize = 80;
/// GMRES budget in operator products.
const MAX_PRODUCTS: usize = 40_000;

/// Solves `A x = b` (or `A^T x = b`) for the triplet matrix `A`: sparse LU up to
/// [`DIRECT_MAX`] unknowns (or when `force_direct`), otherwise Jacobi-preconditioned GMRES with
/// a sparse-LU fallback. Returns `None` when both fail to reach `tol`.
pub(crate) fn solve_triplets(
    n: usize,
    triplets: &[(usize, usize, f64)],
    b: &[f64],
    transpose: bool,
    tol: f64,
    force_direct: bool,
) -> Option<Vec<f64>> {
    let check = |x: &[f64]| {
        let r = if transpose {
            residual_transpose(triplets, x, b)
        } else {
            residual(triplets, x, b)
        };
        r <= tol
    };
    if n > DIRECT_MAX && !force_direct {
        let mut diag = vec![0.0; n];
        for &(i, j, v) in triplets {
            if i == j {
                diag[i] += v;
            }
        }
        if diag.iter().all(|d| d.abs() > 0.0 && d.is_finite()) {
            let apply = |x: &[f64], out: &mut [f64]| {
                out.iter_mut().for_each(|o| *o = 0.0);
                if transpose {
                    for &(i, j, v) in triplets {
                        out[j] += v * x[i];
                    }
                } else {
                    for &(i, j, v) in triplets {
                        out[i] += v * x[j];
                    }
                }
            };
            let target = tol / (2.0 * (n as f64).sqrt());
            let k = gmres(
                &apply,
                &diag,
                b,
                vec![0.0; n],
                target,
                RESTART,
                MAX_PRODUCTS,
            );
            if k.relative_residual.is_finite() && check(&k.x) {
                return Some(k.x);
            }
        }
    }
    let lu = SparseLu::new(n, triplets)?;
    let x = if transpose {
        lu.solve_transpose(b)
    } else {
        lu.solve(b)
    };
    if x.iter().all(|v| v.is_finite()) && check(&x) {
        Some(x)
    } else {
        None
    }
}

/// A factorised square sparse matrix.
pub(crate) struct SparseLu {
    n: usize,
    lu: Lu<usize, f64>,
}

impl SparseLu {
    /// Factorises the `n x n` matrix whose entries are the triplets `(row, col, value)`
    /// (duplicates are summed). `None` when the matrix is structurally singular.
    pub(crate) fn new(n: usize, triplets: &[(usize, usize, f64)]) -> Option<Self> {
        let entries: Vec<Triplet<usize, usize, f64>> = triplets
            .iter()
            .map(|&(r, c, v)| Triplet::new(r, c, v))
            .collect();
        let matrix = SparseColMat::<usize, f64>::try_new_from_triplets(n, n, &entries).ok()?;
        let lu = matrix.sp_lu().ok()?;
        Some(Self { n, lu })
    }

    /// Solves `A x = b`.
    pub(crate) fn solve(&self, b: &[f64]) -> Vec<f64> {
        let mut rhs = Mat::<f64>::from_fn(self.n, 1, |i, _| b[i]);
        self.lu.solve_in_place(rhs.as_mut());
        rhs.col(0).iter().copied().collect()
    }

    /// Solves `A^T x = b`.
    pub(crate) fn solve_transpose(&self, b: &[f64]) -> Vec<f64> {
        let mut rhs = Mat::<f64>::from_fn(self.n, 1, |i, _| b[i]);
        self.lu.solve_transpose_in_place(rhs.as_mut());
        rhs.col(0).iter().copied().collect()
    }
}

/// `max_i |(A x - b)_i| / max(max_i |b_i|, tiny)` for the triplet matrix `A`.
pub(crate) fn residual(triplets: &[(usize, usize, f64)], x: &[f64], b: &[f64]) -> f64 {
    let mut r = b.iter().map(|v| -v).collect::<Vec<f64>>();
    for &(i, j, v) in triplets {
        r[i] += v * x[j];
    }
    let scale = b.iter().fold(f64::MIN_POSITIVE, |m, v| m.max(v.abs()));
    r.iter().fold(0.0f64, |m, v| m.max(v.abs())) / scale
}

/// Residual of the transposed system `A^T x = b`.
pub(crate) fn residual_transpose(triplets: &[(usize, usize, f64)], x: &[f64], b: &[f64]) -> f64 {
    let mut r = b.iter().map(|v| -v).collect::<Vec<f64>>();
    for &(i, j, v) in triplets {
        r[j] += v * x[i];
    }
    let scale = b.iter().fold(f64::MIN_POSITIVE, |m, v| m.max(v.abs()));
    r.iter().fold(0.0f64, |m, v| m.max(v.abs())) / scale
}

/// Outcome of [`gmres`].
pub(crate) struct Krylov {
    /// The approximate solution.
    pub(crate) x: Vec<f64>,
    /// Achieved `||b - A x|| / ||b||` (recomputed explicitly).
    pub(crate) relative_residual: f64,
}

fn norm(v: &[f64]) -> f64 {
    v.iter().map(|x| x * x).sum::<f64>().sqrt()
}

/// Restarted GMRES with a right diagonal preconditioner `diag` (`A diag^{-1} y = b`,
/// `x = diag^{-1} y`) for the operator `apply(x, out) = A x`, from `x0`, until the
/// recomputed relative residual is at most `tol` or `max_products` products were spent.
pub(crate) fn gmres(
    apply: &dyn Fn(&[f64], &mut [f64]),
    diag: &[f64],
    b: &[f64],
    x0: Vec<f64>,
    tol: f64,
    restart: usize,
    max_products: usize,
) -> Krylov {
    let n = b.len();
    let bnorm = norm(b).max(f64::MIN_POSITIVE);
    let mut x = x0;
    let mut products = 0;
    let mut r = vec![0.0; n];
    let mut w = vec![0.0; n];
    let mut z = vec![0.0; n];
    loop {
        apply(&x, &mut r);
        products += 1;
        r.iter_mut().zip(b).for_each(|(ri, bi)| *ri = bi - *ri);
        let beta = norm(&r);
        if beta <= tol * bnorm || products >= max_products || !beta.is_finite() {
            return Krylov {
                x,
                relative_residual: beta / bnorm,
            };
        }
        let mut basis: Vec<Vec<f64>> = vec![r.iter().map(|v| v / beta).collect()];
        let mut h: Vec<Vec<f64>> = Vec::new(); // column j: H[0..=j+1][j]
        let (mut cs, mut sn): (Vec<f64>, Vec<f64>) = (Vec::new(), Vec::new());
        let mut g = vec![beta];
        let mut k = 0;
        while k < restart && products < max_products {
            for ((zi, vi), di) in z.iter_mut().zip(&basis[k]).zip(diag) {
                *zi = vi / di;
            }
            apply(&z, &mut w);
            products += 1;
            let mut col = Vec::with_capacity(k + 2);
            for v in &basis {
                let hij: f64 = v.iter().zip(&w).map(|(a, c)| a * c).sum();
                w.iter_mut().zip(v).for_each(|(wi, vi)| *wi -= hij * vi);
                col.push(hij);
            }
            let hn = norm(&w);
            col.push(hn);
            for i in 0..k {
                let (a, c) = (col[i], col[i + 1]);
                col[i] = cs[i] * a + sn[i] * c;
                col[i + 1] = -sn[i] * a + cs[i] * c;
            }
            let (a, c) = (col[k], col[k + 1]);
            let d = a.hypot(c).max(f64::MIN_POSITIVE);
            cs.push(a / d);
            sn.push(c / d);
            col[k] = d;
            col[k + 1] = 0.0;
            g.push(-sn[k] * g[k]);
            g[k] *= cs[k];
            h.push(col);
            k += 1;
            if g[k].abs() <= 0.5 * tol * bnorm || hn <= f64::MIN_POSITIVE {
                break;
            }
            basis.push(w.iter().map(|v| v / hn).collect());
        }
        // Back substitution H y = g.
        let mut y = vec![0.0; k];
        for i in (0..k).rev() {
            let mut acc = g[i];
            for (j, yj) in y.iter().enumerate().skip(i + 1) {
                acc -= h[j][i] * yj;
            }
            y[i] = acc / h[i][i];
        }
        for (j, yj) in y.iter().enumerate() {
            for ((xi, vi), di) in x.iter_mut().zip(&basis[j]).zip(diag) {
                *xi += yj * vi / di;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gmres_and_the_sparse_lu_solve_the_same_nonsymmetric_system() {
        // Common practice: a diagonally dominant nonsymmetric system, solved both ways.
        let n = 60;
        let mut t = Vec::new();
        for i in 0..n {
            t.push((i, i, 3.0 + (i % 7) as f64));
            t.push((i, (i + 1) % n, -1.0));
            t.push((i, (i * 7 + 3) % n, -0.5 - (i % 3) as f64 * 0.3));
        }
        let b: Vec<f64> = (0..n).map(|i| (i as f64).sin()).collect();
        let lu = SparseLu::new(n, &t).unwrap();
        let direct = lu.solve(&b);
        let direct_t = lu.solve_transpose(&b);
        let apply = |x: &[f64], out: &mut [f64]| {
            out.iter_mut().for_each(|o| *o = 0.0);
            for &(i, j, v) in &t {
                out[i] += v * x[j];
            }
        };
        let apply_t = |x: &[f64], out: &mut [f64]| {
            out.iter_mut().for_each(|o| *o = 0.0);
            for &(i, j, v) in &t {
                out[j] += v * x[i];
            }
        };
        let diag: Vec<f64> = (0..n).map(|i| 3.0 + (i % 7) as f64).collect();
        for (op, want) in [
            (&apply as &dyn Fn(&[f64], &mut [f64]), &direct),
            (&apply_t, &direct_t),
        ] {
            let k = gmres(op, &diag, &b, vec![0.0; n], 1e-13, 10, 10_000);
            assert!(k.relative_residual <= 1e-13);
            for (a, c) in k.x.iter().zip(want) {
                assert!((a - c).abs() < 1e-11);
            }
        }
        assert!(residual(&t, &direct, &b) < 1e-13);
        assert!(residual_transpose(&t, &direct_t, &b) < 1e-13);
    }
}
