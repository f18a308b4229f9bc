//! Partial derivatives of a start-weighted first-order approximation with respect to the
//! kernel entries, by the adjoint method (formulas in the parent module's docs).
//!
//! After the two pair solves (adjoint `Y`, forward `Psi` for the weighted right-hand side) and
//! two bordered solves for the reproductive values, each partial is one or two dot products
//! of length `m` plus a walk over one kernel row: `O(m (nnz + m))` for all of them, about the
//! cost of one operator product.

use super::operator::{packed_index, unpack};
use super::values::Bordered;
use super::{solve_pairs, Setup, SolveInfo, WeakConfig, WeakError};
use crate::model::{Model, Rule, Scope};
use crate::sensitivity::KernelPartials;
use rayon::prelude::*;

/// A start-weighted first-order approximation `f(s) = neutral + s slope` and its partial
/// derivatives with respect to the kernel entries.
#[derive(Debug, Clone, PartialEq)]
pub struct WeakGradient {
    /// `sum_k u_k rho_k(1)`.
    pub neutral: f64,
    /// `sum_k u_k rho'_k`.
    pub slope: f64,
    /// `∂ neutral / ∂K_ij`.
    pub neutral_partials: KernelPartials,
    /// `∂ slope / ∂K_ij`.
    pub slope_partials: KernelPartials,
    /// How the pair systems were solved.
    pub info: SolveInfo,
}

impl WeakGradient {
    /// `neutral + s slope`.
    pub fn value(&self, s: f64) -> f64 {
        self.neutral + s * self.slope
    }

    /// Partials of [`WeakGradient::value`] at `s`.
    pub fn partials(&self, s: f64) -> KernelPartials {
        KernelPartials {
            demes: self.neutral_partials.demes,
            entries: self
                .neutral_partials
                .entries
                .iter()
                .zip(&self.slope_partials.entries)
                .map(|(&(i, j, a), &(_, _, b))| (i, j, a + s * b))
                .collect(),
        }
    }
}

/// The first-order approximation of the fixation probability of a start placing the variant
/// in deme `k` with probability `weights[k]`, and its partial derivatives with respect to the
/// rule's kernel (`B` for death-birth and Wright-Fisher, `F` for birth-death) at every
/// positive entry and every diagonal entry, row-major. The partials treat the entries as
/// free; a link effect is a difference along a row (see [`crate::sensitivity`]).
///
/// # Panics
/// If `weights.len()` differs from the number of demes.
pub fn gradient(
    model: &Model,
    weights: &[f64],
    config: &WeakConfig,
) -> Result<WeakGradient, WeakError> {
    let m = model.demes();
    assert_eq!(weights.len(), m, "one weight per deme");
    let setup = Setup::new(model, config)?;
    let rhs = setup.forward_rhs(weights);
    let solved = solve_pairs(model, &setup, config, Some(&rhs))?;
    let psi_packed = solved.forward.as_ref().ok_or(WeakError::Singular)?;
    let n = &setup.n;
    let slope: f64 = (0..m)
        .map(|k| {
            let row: f64 = (0..m).map(|j| solved.adjoint[packed_index(m, k, j)]).sum();
            weights[k] * 2.0 * setup.scale * row / n[k]
        })
        .sum();
    let neutral: f64 = setup
        .neutral()
        .iter()
        .zip(weights)
        .map(|(a, w)| a * w)
        .sum();

    let mut y = vec![0.0; m * m];
    unpack(m, &solved.adjoint, &mut y);
    let mut psi = vec![0.0; m * m];
    unpack(m, psi_packed, &mut psi);
    for j in 0..m {
        if setup.masked[j] {
            y[j * m + j] = 0.0;
            psi[j * m + j] = 0.0;
        }
    }
    let info = solved.info;
    drop(solved);
    let bordered = Bordered::new(model, &setup.temperature)?;
    let kernel = model.kernel();
    let dot = |a: &[f64], b: &[f64]| a.iter().zip(b).map(|(x, y)| x * y).sum::<f64>();
    let rv = &setup.rv;

    // Per row a: the columns b (positive entries and the diagonal), with (neutral, slope).
    let rows: Vec<Vec<(usize, f64, f64)>> = match model.rule() {
        Rule::DeathBirth | Rule::WrightFisher => {
            let psi_diagonal: Vec<f64> = (0..m).map(|j| psi[j * m + j]).collect();
            let mut phi = psi;
            for j in 0..m {
                phi[j * m + j] *= 1.0 - 1.0 / n[j];
            }
            let g: Vec<f64> = match model.scope() {
                Scope::Deme => (0..m)
                    .map(|j| (n[j] - 1.0) / (2.0 * n[j] * setup.scale) * psi_diagonal[j])
                    .collect(),
                Scope::Neighbourhood => (0..m)
                    .map(|i| {
                        let mut acc = 0.0;
                        for (j, bj) in kernel.row(i) {
                            for (l, bl) in kernel.row(i) {
                                acc += bj * bl * phi[l * m + j];
                            }
                        }
                        acc / (2.0 * setup.scale)
                    })
                    .collect(),
            };
            let h0: Vec<f64> = weights.iter().zip(n).map(|(w, n)| w / n).collect();
            let u0 = bordered.sensitivity(&h0)?;
            let u1 = bordered.sensitivity(&g)?;
            let neighbourhood = model.scope() == Scope::Neighbourhood;
            let wright_fisher = model.rule() == Rule::WrightFisher;
            (0..m)
                .into_par_iter()
                .map(|a| {
                    let ya = column(&y, m, a);
                    // Row a of Y B (Wright-Fisher): (Y B)_ak = sum_r Y_ar B_rk.
                    let left: Vec<f64> = if wright_fisher {
                        let mut q = vec![0.0; m];
                        for (r, &yr) in ya.iter().enumerate() {
                            if yr != 0.0 {
                                for (k, b) in kernel.row(r) {
                                    q[k] += b * yr;
                                }
                            }
                        }
                        q
                    } else {
                        ya.to_vec()
                    };
                    entry_columns(kernel, a)
                        .into_iter()
                        .map(|b| {
                            let phi_b = column(&phi, m, b);
                            let mut slope = 2.0 * dot(&left, phi_b) + rv[a] * u1[b];
                            if neighbourhood {
                                let b_phi: f64 =
                                    kernel.row(a).map(|(l, beta)| beta * phi_b[l]).sum();
                                slope += rv[a] * b_phi / setup.scale;
                            }
                            (b, rv[a] * u0[b], slope)
                        })
                        .collect()
                })
                .collect()
        }
        Rule::BirthDeath => {
            let total = setup.scale;
            let y_psi: Vec<f64> = (0..m)
                .map(|b| dot(column(&y, m, b), column(&psi, m, b)))
                .collect();
            let g: Vec<f64> = (0..m)
                .map(|i| {
                    let acc: f64 = kernel
                        .col(i)
                        .map(|(l, f)| {
                            let parents = if l == i { n[l] - 1.0 } else { n[l] };
                            f * parents * psi[i * m + l]
                        })
                        .sum();
                    acc / (2.0 * total)
                })
                .collect();
            let u0 = bordered.sensitivity(weights)?;
            let u1 = bordered.sensitivity(&g)?;
            (0..m)
                .into_par_iter()
                .map(|a| {
                    let psi_a = column(&psi, m, a);
                    let psi_aa = psi_a[a];
                    entry_columns(kernel, a)
                        .into_iter()
                        .map(|b| {
                            let y_ab = y[b * m + a];
                            let operator = 2.0 / n[b]
                                * (n[a] * dot(column(&y, m, b), psi_a)
                                    - y_ab * psi_aa
                                    - n[a] * y_psi[b]);
                            let parents = if a == b { n[a] - 1.0 } else { n[a] };
                            let direct = rv[b] * parents * psi_a[b] / (2.0 * total);
                            let through = |u: &[f64]| rv[b] * (u[a] - n[a] / n[b] * u[b]);
                            (b, through(&u0), operator + direct + through(&u1))
                        })
                        .collect()
                })
                .collect()
        }
    };
    let mut neutral_entries = Vec::new();
    let mut slope_entries = Vec::new();
    for (a, row) in rows.into_iter().enumerate() {
        for (b, d0, d1) in row {
            neutral_entries.push((a, b, d0));
            slope_entries.push((a, b, d1));
        }
    }
    Ok(WeakGradient {
        neutral,
        slope,
        neutral_partials: KernelPartials {
            demes: m,
            entries: neutral_entries,
        },
        slope_partials: KernelPartials {
            demes: m,
            entries: slope_entries,
        },
        info,
    })
}

/// Columns of row `a` with a positive entry, and `a` itself, ascending and each once.
fn entry_columns(kernel: &crate::migration::StochasticMatrix, a: usize) -> Vec<usize> {
    let mut cols: Vec<usize> = kernel.row(a).map(|(b, _)| b).collect();
    if let Err(pos) = cols.binary_search(&a) {
        cols.insert(pos, a);
    }
    cols
}

/// Column `l` of a column-major `m x m` matrix.
fn column(v: &[f64], m: usize, l: usize) -> &[f64] {
    &v[l * m..(l + 1) * m]
}
