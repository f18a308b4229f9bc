//! Solvers for the sparse system of the death-birth and birth-death chains.
//!
//! Three systems share the matrix `A`: `A h = b` (fixation probability, `b` the one-step
//! probabilities into fixation), `A t = 1` (mean number of events to absorption) and
//! `A w = h` (`w / h` is the mean number of events to fixation among fixing paths).
//!
//! * [`direct`]: sparse LU from faer, one factorisation for all three right-hand sides.
//! * [`iterative`]: BiCGSTAB from faer on the system renumbered by total count
//!   ([`super::levels`]), preconditioned by [`super::precond`] (Jacobi, ILU(0), or the
//!   two-level total-count preconditioner with a Jacobi or ILU(0) smoother), restarted from
//!   its last iterate until the explicitly computed residual meets the target or stops
//!   improving. `A h = b` and `A t = 1` run side by side, one sequential solve per core;
//!   `A w = h` follows, started from `h t`, with parallel products and level-parallel ILU
//!   sweeps.
//!
//! Both compute the achieved relative residual `||b - A x|| / ||b||` of every system
//! themselves; the solver's own running residual is not trusted.

use super::assembly::{relative_residual, EventSystem};
use super::levels::Levels;
use super::precond::{Ilu0, Jacobi, SystemOperator, TwoLevel};
use super::space::StateSpace;
use faer::dyn_stack::{MemBuffer, MemStack};
use faer::matrix_free::{
    bicgstab::{bicgstab, bicgstab_scratch, BicgParams},
    IdentityPrecond, InitialGuessStatus, Precond,
};
use faer::prelude::Solve;
use faer::sparse::{SparseColMat, SymbolicSparseColMat};
use faer::{Mat, Par};

/// The three solutions over the transient states, with how they were obtained.
#[derive(Debug, Clone)]
pub(crate) struct Solutions {
    /// Fixation probability.
    pub(crate) h: Vec<f64>,
    /// Mean time to absorption (in the chain's own steps).
    pub(crate) t: Vec<f64>,
    /// Fixation probability times the mean conditional fixation time.
    pub(crate) w: Vec<f64>,
    /// Largest achieved relative residual.
    pub(crate) residual: f64,
    /// Iterations summed over the three systems (iterative solver only).
    pub(crate) iterations: Option<usize>,
}

/// Why a solve failed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum SolveFailure {
    /// The achieved relative residual stayed above the acceptance level.
    Residual(f64),
}

/// Largest relative residual accepted from any solver.
pub(crate) const ACCEPTED_RESIDUAL: f64 = 1e-8;

/// Iteration budget of the iterative solver, per system.
pub(crate) const MAX_ITERATIONS: usize = 20_000;

/// Iterations between restarts of BiCGSTAB (each restart recomputes the true residual).
const RESTART: usize = 2_000;

/// The right-hand side of `A t = 1`: one event out of every state, none out of frozen ones.
fn ones(system: &EventSystem) -> Vec<f64> {
    system
        .frozen
        .iter()
        .map(|&f| if f { 0.0 } else { 1.0 })
        .collect()
}

/// Solves the three systems with one sparse LU factorisation.
pub(crate) fn direct(system: &EventSystem) -> Result<Solutions, SolveFailure> {
    direct_with_adjoint(system, None).map(|(solutions, _)| solutions)
}

/// The adjoint pair of a weighted objective `c · h`: `A^T g = c` and `A^T u = g`.
///
/// `g` holds the expected visits to each transient state from the weighted start (the rows
/// of the fundamental matrix `(I - Q)^-1`, Kemeny & Snell 1960, weighted by `c`); `u` is what
/// the gradient of `c · w` needs for the `h` on the right-hand side of `A w = h`.
#[derive(Debug, Clone)]
pub(crate) struct AdjointPair {
    /// Solution of `A^T g = c`.
    pub(crate) g: Vec<f64>,
    /// Solution of `A^T u = g`.
    pub(crate) u: Vec<f64>,
    /// Largest achieved relative residual of the two systems.
    pub(crate) residual: f64,
    /// Iterations of the iterative solver (summed), `None` for direct.
    pub(crate) iterations: Option<usize>,
}

/// As [`direct`], and with `adjoint = Some(c)` also the [`AdjointPair`] of `c`, all from one
/// factorisation.
pub(crate) fn direct_with_adjoint(
    system: &EventSystem,
    adjoint: Option<&[f64]>,
) -> Result<(Solutions, Option<AdjointPair>), SolveFailure> {
    let n = system.dim();
    // The compressed rows of A are the compressed columns of A^T: factor A^T and solve with
    // its transpose. Row-diagonal dominance of A is column dominance of A^T, for which the
    // partially pivoted LU is stable.
    let mut col_ptr = Vec::with_capacity(n + 1);
    let mut row_idx = Vec::with_capacity(system.nonzeros());
    let mut val = Vec::with_capacity(system.nonzeros());
    col_ptr.push(0usize);
    for row in 0..n {
        let range = system.row_start[row]..system.row_start[row + 1];
        let mut diagonal_done = false;
        for (&c, &p) in system.col[range.clone()].iter().zip(&system.prob[range]) {
            let c = c as usize;
            if !diagonal_done && c > row {
                row_idx.push(row);
                val.push(system.diag[row]);
                diagonal_done = true;
            }
            row_idx.push(c);
            val.push(-p);
        }
        if !diagonal_done {
            row_idx.push(row);
            val.push(system.diag[row]);
        }
        col_ptr.push(row_idx.len());
    }
    let symbolic = SymbolicSparseColMat::new_checked(n, n, col_ptr, None, row_idx);
    let transposed = SparseColMat::<usize, f64>::new(symbolic, val);
    let lu = transposed
        .sp_lu()
        .map_err(|_| SolveFailure::Residual(f64::INFINITY))?;

    let mut rhs = Mat::<f64>::zeros(n, 2);
    let b_fix = system.to_fixation.clone();
    let b_time = ones(system);
    rhs.col_mut(0)
        .iter_mut()
        .zip(&b_fix)
        .for_each(|(x, &b)| *x = b);
    rhs.col_mut(1)
        .iter_mut()
        .zip(&b_time)
        .for_each(|(x, &b)| *x = b);
    lu.solve_transpose_in_place(rhs.as_mut());
    let h: Vec<f64> = rhs.col(0).iter().copied().collect();
    let t: Vec<f64> = rhs.col(1).iter().copied().collect();
    let mut w_mat = Mat::<f64>::from_fn(n, 1, |i, _| h[i]);
    lu.solve_transpose_in_place(w_mat.as_mut());
    let w: Vec<f64> = w_mat.col(0).iter().copied().collect();

    let residual = [
        system.relative_residual(&h, &b_fix),
        system.relative_residual(&t, &b_time),
        system.relative_residual(&w, &h),
    ]
    .into_iter()
    .fold(0.0f64, worst);
    if residual.is_nan() || residual > ACCEPTED_RESIDUAL {
        return Err(SolveFailure::Residual(residual));
    }
    let pair = match adjoint {
        None => None,
        Some(c) => {
            // `lu` factors A^T, so the plain solve is the adjoint one.
            let mut g_mat = Mat::<f64>::from_fn(n, 1, |i, _| c[i]);
            lu.solve_in_place(g_mat.as_mut());
            let g: Vec<f64> = g_mat.col(0).iter().copied().collect();
            lu.solve_in_place(g_mat.as_mut());
            let u: Vec<f64> = g_mat.col(0).iter().copied().collect();
            let transposed = system.transposed();
            let residual = worst(
                transposed.relative_residual(&g, c),
                transposed.relative_residual(&u, &g),
            );
            if residual.is_nan() || residual > ACCEPTED_RESIDUAL {
                return Err(SolveFailure::Residual(residual));
            }
            Some(AdjointPair {
                g,
                u,
                residual,
                iterations: None,
            })
        }
    };
    Ok((
        Solutions {
            h,
            t,
            w,
            residual,
            iterations: None,
        },
        pair,
    ))
}

/// The [`AdjointPair`] of `c` by preconditioned BiCGSTAB on `A^T`, renumbered by total count
/// like the forward systems (the transpose keeps the block-tridiagonal count structure, so
/// the same preconditioner construction applies to it).
pub(crate) fn iterative_adjoint(
    system: &EventSystem,
    space: &StateSpace,
    preconditioner: Preconditioner,
    c: &[f64],
    tolerance: f64,
) -> Result<AdjointPair, SolveFailure> {
    let transposed = system.transposed();
    let levels = Levels::new(&transposed, space);
    let ordered = &levels.system;
    let c_ordered: Vec<f64> = levels.old.iter().map(|&o| c[o as usize]).collect();
    let pair = match preconditioner {
        Preconditioner::Jacobi => {
            adjoint_pair(ordered, &Jacobi::new(ordered), &c_ordered, tolerance)
        }
        Preconditioner::TwoLevel => adjoint_pair(
            ordered,
            &TwoLevel::new(ordered, &levels, false),
            &c_ordered,
            tolerance,
        ),
        Preconditioner::TwoLevelIlu0 => adjoint_pair(
            ordered,
            &TwoLevel::new(ordered, &levels, true),
            &c_ordered,
            tolerance,
        ),
        Preconditioner::Ilu0 => adjoint_pair(
            ordered,
            &Ilu0::new(ordered, Some(&levels.start)),
            &c_ordered,
            tolerance,
        ),
    }?;
    Ok(AdjointPair {
        g: levels.to_mixed_radix(&pair.g),
        u: levels.to_mixed_radix(&pair.u),
        ..pair
    })
}

/// `A^T g = c` then `A^T u = g`, on a system that already is `A^T`.
fn adjoint_pair<P: Precond<f64> + Sync>(
    transposed: &EventSystem,
    precond: &P,
    c: &[f64],
    tolerance: f64,
) -> Result<AdjointPair, SolveFailure> {
    let operator = SystemOperator { system: transposed };
    // Started from the Jacobi guess `D^-1 c`: from zero, a start weighting concentrated on one
    // state makes the shadow residual a unit vector, and BiCGSTAB then stalls at relative
    // residual 1 (seen on three demes of 45-47: 2,000 iterations without progress).
    let jacobi_start: Vec<f64> = c
        .iter()
        .zip(&transposed.diag)
        .map(|(&cc, &d)| cc / d)
        .collect();
    let (g, res_g, it_g) = bicgstab_solve(
        &operator,
        precond,
        c,
        Some(&jacobi_start),
        tolerance,
        Par::rayon(0),
    )?;
    let (u, res_u, it_u) = bicgstab_solve(&operator, precond, &g, None, tolerance, Par::rayon(0))?;
    Ok(AdjointPair {
        g,
        u,
        residual: worst(res_g, res_u),
        iterations: Some(it_g + it_u),
    })
}

/// Larger of two residuals, NaN winning.
fn worst(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        a.max(b)
    }
}

/// Preconditioner of the iterative solver.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Preconditioner {
    /// Diagonal scaling.
    #[cfg_attr(not(test), allow(dead_code))]
    Jacobi,
    /// Jacobi smoothing around an exact coarse solve on the total variant count.
    #[cfg_attr(not(test), allow(dead_code))]
    TwoLevel,
    /// Incomplete LU with the sparsity of `A`.
    #[cfg_attr(not(test), allow(dead_code))]
    Ilu0,
    /// ILU(0) smoothing around the coarse solve on the total variant count.
    TwoLevelIlu0,
}

impl Preconditioner {
    /// Solver name for the report.
    pub(crate) fn solver_name(self) -> &'static str {
        match self {
            Preconditioner::Jacobi => "bicgstab_jacobi",
            Preconditioner::TwoLevel => "bicgstab_two_level",
            Preconditioner::Ilu0 => "bicgstab_ilu0",
            Preconditioner::TwoLevelIlu0 => "bicgstab_two_level_ilu0",
        }
    }
}

/// Solves the three systems with preconditioned BiCGSTAB to relative residual `tolerance`
/// (accepting up to [`ACCEPTED_RESIDUAL`] when the budget runs out). The solve runs on the
/// system renumbered by total count ([`Levels`]); the solutions come back in mixed-radix order.
pub(crate) fn iterative(
    system: &EventSystem,
    space: &StateSpace,
    preconditioner: Preconditioner,
    tolerance: f64,
) -> Result<Solutions, SolveFailure> {
    let levels = Levels::new(system, space);
    let ordered = &levels.system;
    let solutions = match preconditioner {
        Preconditioner::Jacobi => iterate(ordered, &Jacobi::new(ordered), tolerance),
        Preconditioner::TwoLevel => {
            iterate(ordered, &TwoLevel::new(ordered, &levels, false), tolerance)
        }
        Preconditioner::TwoLevelIlu0 => {
            iterate(ordered, &TwoLevel::new(ordered, &levels, true), tolerance)
        }
        Preconditioner::Ilu0 => {
            iterate(ordered, &Ilu0::new(ordered, Some(&levels.start)), tolerance)
        }
    }?;
    Ok(Solutions {
        h: levels.to_mixed_radix(&solutions.h),
        t: levels.to_mixed_radix(&solutions.t),
        w: levels.to_mixed_radix(&solutions.w),
        ..solutions
    })
}

fn iterate<P: Precond<f64> + Sync>(
    system: &EventSystem,
    precond: &P,
    tolerance: f64,
) -> Result<Solutions, SolveFailure> {
    let operator = SystemOperator { system };
    let b_fix = system.to_fixation.clone();
    let b_time = ones(system);
    // `A h = b` and `A t = 1` are independent: one sequential solve on each core.
    let (fix, time) = rayon::join(
        || bicgstab_solve(&operator, precond, &b_fix, None, tolerance, Par::Seq),
        || bicgstab_solve(&operator, precond, &b_time, None, tolerance, Par::Seq),
    );
    let ((h, res_h, it_h), (t, res_t, it_t)) = (fix?, time?);
    // `w / h` is a conditional mean number of events of the order of `t`: start `A w = h`
    // from `h t` (it saves about a tenth of the iterations of that system).
    let start: Vec<f64> = h.iter().zip(&t).map(|(h, t)| h * t).collect();
    let (w, res_w, it_w) = bicgstab_solve(
        &operator,
        precond,
        &h,
        Some(&start),
        tolerance,
        Par::rayon(0),
    )?;
    Ok(Solutions {
        h,
        t,
        w,
        residual: worst(worst(res_h, res_t), res_w),
        iterations: Some(it_h + it_t + it_w),
    })
}

/// One system by restarted BiCGSTAB; returns the solution, its true relative residual and the
/// iterations used.
fn bicgstab_solve<P: Precond<f64> + Sync>(
    operator: &SystemOperator<'_>,
    precond: &P,
    b: &[f64],
    start: Option<&[f64]>,
    tolerance: f64,
    par: Par,
) -> Result<(Vec<f64>, f64, usize), SolveFailure> {
    let n = b.len();
    let identity = IdentityPrecond { dim: n };
    let rhs = Mat::<f64>::from_fn(n, 1, |i, _| b[i]);
    let mut x = Mat::<f64>::from_fn(n, 1, |i, _| start.map_or(0.0, |s| s[i]));
    let mut buffer = MemBuffer::new(bicgstab_scratch(identity, precond, operator, 1, par));
    let mut used = 0usize;
    let mut best: Option<(Vec<f64>, f64)> = None;
    let mut jacobi_started = false;
    while used < MAX_ITERATIONS {
        let params = BicgParams {
            // Always "maybe nonzero" (with `x` holding the start): faer 0.24.4 leaves the
            // residual uninitialised when told the initial guess is zero.
            initial_guess: InitialGuessStatus::MaybeNonZero,
            abs_tolerance: 0.0,
            rel_tolerance: tolerance,
            max_iters: RESTART.min(MAX_ITERATIONS - used),
            ..Default::default()
        };
        let outcome = bicgstab(
            x.as_mut(),
            identity,
            precond,
            operator,
            rhs.as_ref(),
            params,
            |_| {},
            par,
            MemStack::new(&mut buffer),
        );
        used += match outcome {
            Ok(info) => info.iter_count.max(1),
            Err(_) => params.max_iters,
        };
        let current: Vec<f64> = x.col(0).iter().copied().collect();
        let residual = operator.system.relative_residual(&current, b);
        if !residual.is_finite() {
            // Breakdown (for instance an exact solution at a half step, which faer turns into
            // 0/0): restart from the best iterate so far, or else from the Jacobi guess
            // `D^-1 b`, which starts a different Krylov sequence than the zero start did.
            match &best {
                Some((good, _)) => x.col_mut(0).iter_mut().zip(good).for_each(|(a, &g)| *a = g),
                None if !jacobi_started => {
                    jacobi_started = true;
                    let diag = &operator.system.diag;
                    x.col_mut(0)
                        .iter_mut()
                        .zip(b.iter().zip(diag))
                        .for_each(|(a, (&bb, &d))| *a = bb / d);
                }
                None => break,
            }
            continue;
        }
        let previous = best.as_ref().map_or(f64::INFINITY, |(_, r)| *r);
        if residual < previous {
            best = Some((current, residual));
        }
        // Done at the target, or when a restart no longer halves the true residual (the
        // round-off floor of the product, typically near the target).
        if residual <= tolerance || residual > 0.5 * previous {
            break;
        }
    }
    match best {
        Some((x, residual)) if residual <= ACCEPTED_RESIDUAL.max(tolerance) => {
            Ok((x, residual, used))
        }
        Some((_, residual)) => Err(SolveFailure::Residual(residual)),
        None => Err(SolveFailure::Residual(f64::NAN)),
    }
}

/// Relative residual of dense products, re-exported for the Wright-Fisher solver.
pub(crate) fn residual_of(ax: &[f64], b: &[f64]) -> f64 {
    relative_residual(ax, b)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Rule, Scope};
    use crate::population::Population;
    use crate::Model;
    use crate::StochasticMatrix;

    #[test]
    fn both_preconditioners_reproduce_the_direct_solution() {
        let pop = Population::new(vec![6, 9, 12]).unwrap();
        let b = StochasticMatrix::from_weights(&[
            vec![0.8, 0.15, 0.05],
            vec![0.1, 0.7, 0.2],
            vec![0.3, 0.1, 0.6],
        ])
        .unwrap();
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let model = Model::new(&pop, b.clone(), rule, Scope::Deme, 0.2).unwrap();
            let space = StateSpace::new(model.sizes()).unwrap();
            let system = EventSystem::assemble(&model, &space);
            let exact = direct(&system).unwrap();
            for p in [
                Preconditioner::Jacobi,
                Preconditioner::TwoLevel,
                Preconditioner::Ilu0,
                Preconditioner::TwoLevelIlu0,
            ] {
                let got = iterative(&system, &space, p, 1e-12).unwrap();
                assert!(got.residual <= 1e-8);
                for (a, b) in [(&got.h, &exact.h), (&got.t, &exact.t), (&got.w, &exact.w)] {
                    for (x, y) in a.iter().zip(b) {
                        assert!(
                            (x - y).abs() <= 1e-8 * y.abs().max(1e-3),
                            "{p:?}: {x} vs {y}"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn adjoint_solves_agree_across_solvers() {
        let pop = Population::new(vec![4, 5, 6]).unwrap();
        let b = StochasticMatrix::from_weights(&[
            vec![0.7, 0.2, 0.1],
            vec![0.05, 0.8, 0.15],
            vec![0.3, 0.1, 0.6],
        ])
        .unwrap();
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let model = Model::new(&pop, b.clone(), rule, Scope::Deme, 0.2).unwrap();
            let space = StateSpace::new(model.sizes()).unwrap();
            let system = EventSystem::assemble(&model, &space);
            let mut c = vec![0.0; system.dim()];
            c[space.single(1) - 1] = 1.0;
            let (_, pair) = direct_with_adjoint(&system, Some(&c)).unwrap();
            let exact = pair.unwrap();
            for p in [
                Preconditioner::Jacobi,
                Preconditioner::TwoLevel,
                Preconditioner::Ilu0,
                Preconditioner::TwoLevelIlu0,
            ] {
                let got = iterative_adjoint(&system, &space, p, &c, 1e-12)
                    .unwrap_or_else(|e| panic!("{rule:?} {p:?}: {e:?}"));
                for (a, b) in [(&got.g, &exact.g), (&got.u, &exact.u)] {
                    for (x, y) in a.iter().zip(b) {
                        assert!(
                            (x - y).abs() <= 1e-8 * y.abs().max(1e-3),
                            "{p:?}: {x} vs {y}"
                        );
                    }
                }
            }
        }
    }
}
