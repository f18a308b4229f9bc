//! Kernel gradients of the exact death-birth and birth-death answers by the adjoint method.
//!
//! With `A = I - Q` over the transient states, `A h = b`, `A t = 1`, `A w = h`, a start
//! weighting `c` and the adjoint pair `A^T g = c`, `A^T u = g` ([`super::sparse::AdjointPair`]),
//! a parameter `θ` of the transition probabilities `P` moves the weighted answers by
//! (references.md §7.1; Kemeny & Snell 1960, *Finite Markov Chains*; Caswell 2013, Linear
//! Algebra Appl. 438:1727-1745):
//!
//! * `d(c·h) = Σ_x g_x Σ_x' ∂P(x, x') (h_x' - h_x)`,
//! * `d(c·t) = Σ_x g_x Σ_x' ∂P(x, x') (t_x' - t_x)`,
//! * `d(c·w) = Σ_x g_x Σ_x' ∂P(x, x') (w_x' - w_x) + Σ_x u_x Σ_x' ∂P(x, x') (h_x' - h_x)`,
//!
//! where the sums run over the moves `x -> x ± e_i` (the self-loop takes up the rest of each row,
//! so its derivative is minus the sum of the others, which gives the differences), and the
//! absorbing values are `h = 1` at fixation, `h = 0` at loss, `t = w = 0` at both.
//!
//! A move of deme `i` depends on the kernel only through row `i` of `B` (death-birth) or
//! column `i` of `F` (birth-death), with the analytic partials of
//! [`Model::event_probabilities`]:
//!
//! * death-birth, `deme` scope: `up_i = (n_i - k_i)/N Σ_j B_ij a_j`, `down_i = k_i/N Σ_j B_ij c_j`
//!   with `a_j = r k_j / (r k_j + n_j - k_j)`, `c_j = 1 - a_j`;
//! * death-birth, `neighbourhood` scope: `p_i = A_i / (A_i + C_i)` with
//!   `A_i = Σ_j B_ij r k_j / n_j`, `C_i = Σ_j B_ij (n_j - k_j) / n_j`, so
//!   `∂p_i/∂B_ij = (α_j C_i - γ_j A_i) / (A_i + C_i)^2` and `∂q_i = -∂p_i`;
//! * birth-death: `up_l = r Σ_j k_j F_jl / W (n_l - k_l)/n_l`,
//!   `down_l = Σ_j (n_j - k_j) F_jl / W k_l/n_l`, `W = Σ_j r k_j + n_j - k_j` (free of `F`).
//!
//! The sum over states runs in parallel over fixed blocks whose partial sums are added in block
//! order, so the result does not depend on the number of threads.

use super::space::StateSpace;
use crate::model::{Model, Rule, Scope};
use rayon::prelude::*;

/// States per parallel block (fixed, so the order of the sums is fixed).
const BLOCK_STATES: usize = 8192;

/// Vectors over the transient states (system index = state index - 1).
pub(crate) struct Fields<'a> {
    /// Fixation probability.
    pub(crate) h: &'a [f64],
    /// Mean number of events to absorption.
    pub(crate) t: &'a [f64],
    /// `h` times the conditional mean number of events to fixation.
    pub(crate) w: &'a [f64],
    /// Adjoint of the start weighting: `A^T g = c`.
    pub(crate) g: &'a [f64],
    /// Second adjoint: `A^T u = g`.
    pub(crate) u: &'a [f64],
}

/// Partials of `c·h`, `c·t` and `c·w` at each listed kernel entry, in list order.
pub(crate) struct Partials {
    pub(crate) h: Vec<f64>,
    pub(crate) t: Vec<f64>,
    pub(crate) w: Vec<f64>,
}

/// The kernel entries that move deme `i`'s events: `(entry index, other deme j)`, where the
/// entry is `K_ij` (death-birth, row `i`) or `K_ji` (birth-death, column `i`).
fn entries_by_deme(model: &Model, entries: &[(usize, usize)]) -> Vec<Vec<(usize, usize)>> {
    let mut by_deme = vec![Vec::new(); model.demes()];
    for (e, &(a, b)) in entries.iter().enumerate() {
        match model.rule() {
            Rule::BirthDeath => by_deme[b].push((e, a)),
            Rule::DeathBirth | Rule::WrightFisher => by_deme[a].push((e, b)),
        }
    }
    by_deme
}

/// Partials of the weighted answers at `entries` (each `(i, j)` a kernel position).
pub(crate) fn partials(
    model: &Model,
    space: &StateSpace,
    fields: &Fields<'_>,
    entries: &[(usize, usize)],
) -> Partials {
    let n_transient = space.transient();
    let by_deme = entries_by_deme(model, entries);
    let blocks: Vec<usize> = (0..n_transient).step_by(BLOCK_STATES).collect();
    let sums: Vec<Vec<[f64; 3]>> = blocks
        .par_iter()
        .map(|&first| {
            let end = (first + BLOCK_STATES).min(n_transient);
            block_partials(model, space, fields, &by_deme, entries.len(), first, end)
        })
        .collect();
    let mut out = Partials {
        h: vec![0.0; entries.len()],
        t: vec![0.0; entries.len()],
        w: vec![0.0; entries.len()],
    };
    for block in sums {
        for (e, [dh, dt, dw]) in block.into_iter().enumerate() {
            out.h[e] += dh;
            out.t[e] += dt;
            out.w[e] += dw;
        }
    }
    out
}

/// Value of a field at state index `s`, with the absorbing values at loss and fixation.
#[inline]
fn at(field: &[f64], s: usize, fixed: usize, at_fixed: f64) -> f64 {
    if s == 0 {
        0.0
    } else if s == fixed {
        at_fixed
    } else {
        field[s - 1]
    }
}

fn block_partials(
    model: &Model,
    space: &StateSpace,
    f: &Fields<'_>,
    by_deme: &[Vec<(usize, usize)>],
    n_entries: usize,
    first: usize,
    end: usize,
) -> Vec<[f64; 3]> {
    let m = model.demes();
    let n = model.sizes();
    let total = model.total() as f64;
    let r = model.fitness();
    let fixed = space.fixed();
    let mut acc = vec![[0.0; 3]; n_entries];
    let mut k = vec![0u64; m];
    // per source deme j: (a_j, c_j) of death-birth deme scope, (α_j, γ_j) of the
    // neighbourhood scope, (r k_j / W, (n_j - k_j) / W) of birth-death
    let mut src_a = vec![0.0; m];
    let mut src_c = vec![0.0; m];
    space.decode(first + 1, &mut k);
    for x in first..end {
        let s = x + 1;
        let (gx, ux) = (f.g[x], f.u[x]);
        if gx == 0.0 && ux == 0.0 {
            space.advance(&mut k);
            continue;
        }
        match (model.rule(), model.scope()) {
            (Rule::BirthDeath, _) => {
                let w: f64 = (0..m).map(|j| r * k[j] as f64 + (n[j] - k[j]) as f64).sum();
                for j in 0..m {
                    src_a[j] = r * k[j] as f64 / w;
                    src_c[j] = (n[j] - k[j]) as f64 / w;
                }
            }
            (_, Scope::Deme) => {
                for j in 0..m {
                    let mutant = r * k[j] as f64;
                    let resident = (n[j] - k[j]) as f64;
                    let w = mutant + resident;
                    src_a[j] = mutant / w;
                    src_c[j] = resident / w;
                }
            }
            (_, Scope::Neighbourhood) => {
                for j in 0..m {
                    let nj = n[j] as f64;
                    src_a[j] = r * k[j] as f64 / nj;
                    src_c[j] = (n[j] - k[j]) as f64 / nj;
                }
            }
        }
        let (hx, tx, wx) = (f.h[x], f.t[x], f.w[x]);
        for (i, entries) in by_deme.iter().enumerate() {
            if entries.is_empty() {
                continue;
            }
            // weighted value differences of the up and the down move of deme i
            let (mut uh, mut ut, mut uw) = (0.0, 0.0, 0.0);
            if k[i] < n[i] {
                let s2 = s + space.stride(i);
                let dh = at(f.h, s2, fixed, 1.0) - hx;
                uh = gx * dh;
                ut = gx * (at(f.t, s2, fixed, 0.0) - tx);
                uw = gx * (at(f.w, s2, fixed, 0.0) - wx) + ux * dh;
            }
            let (mut dh_, mut dt_, mut dw_) = (0.0, 0.0, 0.0);
            if k[i] > 0 {
                let s2 = s - space.stride(i);
                let dh = at(f.h, s2, fixed, 1.0) - hx;
                dh_ = gx * dh;
                dt_ = gx * (at(f.t, s2, fixed, 0.0) - tx);
                dw_ = gx * (at(f.w, s2, fixed, 0.0) - wx) + ux * dh;
            }
            let vacant = (n[i] - k[i]) as f64;
            let held = k[i] as f64;
            let (cu, cd) = match model.rule() {
                Rule::BirthDeath => (vacant / n[i] as f64, held / n[i] as f64),
                Rule::DeathBirth | Rule::WrightFisher => (vacant / total, held / total),
            };
            // the neighbourhood scope's p_i = A_i / (A_i + C_i) is not linear in the row
            let ratio = (model.rule() != Rule::BirthDeath && model.scope() == Scope::Neighbourhood)
                .then(|| {
                    let (mut big_a, mut big_c) = (0.0, 0.0);
                    for (j, b) in model.kernel().row(i) {
                        big_a += b * src_a[j];
                        big_c += b * src_c[j];
                    }
                    (big_a, big_c, (big_a + big_c) * (big_a + big_c))
                });
            for &(e, j) in entries {
                let (pu, pd) = match ratio {
                    None => (src_a[j] * cu, src_c[j] * cd),
                    Some((big_a, big_c, sum2)) => {
                        let dp = (src_a[j] * big_c - src_c[j] * big_a) / sum2;
                        (dp * cu, -dp * cd)
                    }
                };
                let a = &mut acc[e];
                a[0] += pu * uh + pd * dh_;
                a[1] += pu * ut + pd * dt_;
                a[2] += pu * uw + pd * dw_;
            }
        }
        space.advance(&mut k);
    }
    acc
}
