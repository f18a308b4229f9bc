//! The Wright-Fisher chain: every deme is refilled at once, so one generation can move any
//! count vector to any other and `I - Q` is dense.
//!
//! `P(k -> k') = prod_i Binomial(n_i, p_i(k)).pmf(k'_i)` with `p_i` from
//! [`Model::refill_probabilities`]. The diagonal of `A = I - Q` is the leaving probability
//! `sum_{k' != k} P(k -> k')`, summed rather than taken as `1 - P(k -> k)` so that nearly
//! frozen states keep their digits; a state that cannot leave is frozen (identity row,
//! right-hand side 0). The three systems are solved with one dense partially pivoted LU.

use super::space::StateSpace;
use super::sparse::{residual_of, Solutions, SolveFailure, ACCEPTED_RESIDUAL};
use crate::model::Model;
use faer::prelude::Solve;
use faer::Mat;
use rayon::prelude::*;

/// Binomial(n, p) probabilities of `0..=n`, written to `out`; `ln_fact[j] = ln j!`.
fn binomial_pmf(n: usize, p: f64, ln_fact: &[f64], out: &mut [f64]) {
    out.iter_mut().for_each(|x| *x = 0.0);
    if p <= 0.0 {
        out[0] = 1.0;
    } else if p >= 1.0 {
        out[n] = 1.0;
    } else {
        let (lp, lq) = (p.ln(), (-p).ln_1p());
        for (x, o) in out.iter_mut().enumerate().take(n + 1) {
            let ln_choose = ln_fact[n] - ln_fact[x] - ln_fact[n - x];
            *o = (ln_choose + x as f64 * lp + (n - x) as f64 * lq).exp();
        }
    }
}

/// One row of the chain: the dense row of `A` over transient states (row-major slice), the
/// one-step probability into fixation, and whether the state is frozen.
fn fill_row(
    model: &Model,
    space: &StateSpace,
    ln_fact: &[f64],
    state: usize,
    row: &mut [f64],
) -> (f64, bool) {
    let m = space.demes();
    let sizes = space.sizes();
    let mut k = vec![0u64; m];
    space.decode(state, &mut k);
    let mut p = vec![0.0; m];
    model.refill_probabilities(&k, &mut p);
    let pmf: Vec<Vec<f64>> = (0..m)
        .map(|i| {
            let n = sizes[i] as usize;
            let mut out = vec![0.0; n + 1];
            binomial_pmf(n, p[i], ln_fact, &mut out);
            out
        })
        .collect();
    let mut target = vec![0u64; m];
    let mut leave = 0.0;
    let mut to_fix = 0.0;
    for next in 0..space.states() {
        let prob: f64 = (0..m).map(|i| pmf[i][target[i] as usize]).product();
        if next != state {
            leave += prob;
            if next == space.fixed() {
                to_fix = prob;
            } else if next != 0 {
                row[next - 1] = -prob;
            }
        }
        space.advance(&mut target);
    }
    let frozen = leave == 0.0;
    row[state - 1] = if frozen { 1.0 } else { leave };
    (to_fix, frozen)
}

/// Solves the Wright-Fisher chain of `model` over `space` (times in generations).
pub(crate) fn solve(model: &Model, space: &StateSpace) -> Result<(Solutions, usize), SolveFailure> {
    let n = space.transient();
    let largest = space.sizes().iter().copied().max().unwrap_or(0) as usize;
    let mut ln_fact = vec![0.0f64; largest + 1];
    for j in 1..=largest {
        ln_fact[j] = ln_fact[j - 1] + (j as f64).ln();
    }
    let mut rows = vec![0.0f64; n * n];
    let per_row: Vec<(f64, bool)> = rows
        .par_chunks_mut(n.max(1))
        .enumerate()
        .map(|(i, row)| fill_row(model, space, &ln_fact, i + 1, row))
        .collect();
    let a = Mat::<f64>::from_fn(n, n, |i, j| rows[i * n + j]);
    drop(rows);
    let nonzeros = (0..n)
        .map(|j| a.col(j).iter().filter(|&&v| v != 0.0).count())
        .sum::<usize>();
    let b_fix: Vec<f64> = per_row.iter().map(|&(f, _)| f).collect();
    let b_time: Vec<f64> = per_row
        .iter()
        .map(|&(_, frozen)| if frozen { 0.0 } else { 1.0 })
        .collect();

    let lu = a.partial_piv_lu();
    let mut rhs = Mat::<f64>::from_fn(n, 2, |i, j| if j == 0 { b_fix[i] } else { b_time[i] });
    lu.solve_in_place(rhs.as_mut());
    let h: Vec<f64> = rhs.col(0).iter().copied().collect();
    let t: Vec<f64> = rhs.col(1).iter().copied().collect();
    let mut wm = Mat::<f64>::from_fn(n, 1, |i, _| h[i]);
    lu.solve_in_place(wm.as_mut());
    let w: Vec<f64> = wm.col(0).iter().copied().collect();

    let residual_for = |x: &[f64], b: &[f64]| {
        let xm = Mat::<f64>::from_fn(n, 1, |i, _| x[i]);
        let ax = &a * &xm;
        let ax: Vec<f64> = ax.col(0).iter().copied().collect();
        residual_of(&ax, b)
    };
    let residual = [
        residual_for(&h, &b_fix),
        residual_for(&t, &b_time),
        residual_for(&w, &h),
    ]
    .into_iter()
    .fold(
        0.0f64,
        |acc, r| if r.is_nan() { f64::NAN } else { acc.max(r) },
    );
    if residual.is_nan() || residual > ACCEPTED_RESIDUAL {
        return Err(SolveFailure::Residual(residual));
    }
    Ok((
        Solutions {
            h,
            t,
            w,
            residual,
            iterations: None,
        },
        nonzeros,
    ))
}
