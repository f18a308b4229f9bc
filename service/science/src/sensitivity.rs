//! Sensitivities of a scalar answer (a start-weighted fixation probability, or a mean time)
//! to the entries of the model's kernel, and their conversion to link effects.
//!
//! Every method that differentiates (the exact chain by one adjoint solve, the screening
//! approximations by implicit differentiation) reports raw partial derivatives
//! `∂f/∂K_ij` of the rule's row-stochastic kernel `K` (`B` for death-birth and Wright-Fisher,
//! `F` for birth-death) at the kernel's nonzero entries and its diagonal, as
//! [`KernelPartials`]. This module owns what a "link effect" means: moving a small amount of
//! probability from the off-diagonal entry `K_ij` to the same row's retention `K_ii`, so the
//! row stays stochastic, which is the directional derivative `∂f/∂K_ij − ∂f/∂K_ii`
//! (references.md §7.1; Caswell 2013, Linear Algebra Appl. 438:1727-1745).
//!
//! For a kernel derived from raw flows, [`flow_effects`] carries a link effect through the
//! normalisation of `migration::resolve` to the effect of one more unit of the raw flow.

use crate::migration::StochasticMatrix;
use crate::model::Rule;

/// Raw partial derivatives `∂f/∂K_ij` of one scalar `f` at the kernel's structural entries.
#[derive(Debug, Clone, PartialEq)]
pub struct KernelPartials {
    /// Number of demes.
    pub demes: usize,
    /// `(i, j, ∂f/∂K_ij)` for every `K_ij > 0` and every diagonal entry, each at most once,
    /// in row-major order.
    pub entries: Vec<(usize, usize, f64)>,
}

impl KernelPartials {
    /// The kernel positions every method reports: each `K_ij > 0` and each diagonal entry,
    /// row-major. The single definition of the entry list of [`KernelPartials::entries`].
    pub fn structural_entries(kernel: &StochasticMatrix) -> Vec<(usize, usize)> {
        let m = kernel.dim();
        let mut out = Vec::with_capacity(kernel.nnz() + m);
        for i in 0..m {
            let mut diagonal_done = false;
            for (j, _) in kernel.row(i) {
                if !diagonal_done && j >= i {
                    if j > i {
                        out.push((i, i));
                    }
                    diagonal_done = true;
                }
                out.push((i, j));
            }
            if !diagonal_done {
                out.push((i, i));
            }
        }
        out
    }

    /// Pairs `entries` with `values` (same order).
    pub fn from_values(demes: usize, entries: &[(usize, usize)], values: &[f64]) -> Self {
        assert_eq!(entries.len(), values.len());
        Self {
            demes,
            entries: entries
                .iter()
                .zip(values)
                .map(|(&(i, j), &v)| (i, j, v))
                .collect(),
        }
    }

    /// The partial at diagonal entry `(i, i)` (0 if absent).
    fn diagonal(&self) -> Vec<f64> {
        let mut d = vec![0.0; self.demes];
        for &(i, j, v) in &self.entries {
            if i == j {
                d[i] = v;
            }
        }
        d
    }

    /// The effect of moving probability from each off-diagonal entry `K_ij > 0` to the row's
    /// retention `K_ii`: `∂f/∂K_ij − ∂f/∂K_ii`, per unit of probability moved *into* the link
    /// (so reducing the link changes `f` by minus this per unit removed), in row-major order.
    pub fn link_effects(&self, rule: Rule) -> Vec<LinkEffect> {
        let diagonal = self.diagonal();
        self.entries
            .iter()
            .filter(|&&(i, j, _)| i != j)
            .map(|&(i, j, v)| {
                let (from, to) = match rule {
                    // B_ij: recruits of deme i come from deme j
                    Rule::DeathBirth | Rule::WrightFisher => (j, i),
                    // F_ij: offspring of deme i settle in deme j
                    Rule::BirthDeath => (i, j),
                };
                LinkEffect {
                    row: i,
                    col: j,
                    from,
                    to,
                    derivative: v - diagonal[i],
                }
            })
            .collect()
    }
}

/// The effect of one movement link on a scalar answer.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LinkEffect {
    /// Kernel row of the link.
    pub row: usize,
    /// Kernel column of the link.
    pub col: usize,
    /// Deme the lineage moves from.
    pub from: usize,
    /// Deme the lineage moves to.
    pub to: usize,
    /// `∂f/∂K_row,col − ∂f/∂K_row,row`: the change of `f` per unit of probability moved from
    /// local retention into this link (its negative is the effect of cutting the link).
    pub derivative: f64,
}

/// Links sorted by the size of their effect, largest first (ties by kernel position, so the
/// order is reproducible).
pub fn rank_by_effect(mut links: Vec<LinkEffect>) -> Vec<LinkEffect> {
    links.sort_by(|a, b| {
        b.derivative
            .abs()
            .total_cmp(&a.derivative.abs())
            .then((a.row, a.col).cmp(&(b.row, b.col)))
    });
    links
}

/// The effect of one more unit of the raw flow behind each link, for a kernel derived from a
/// flows matrix `flows` (`C`, row = from, column = to) as `migration::resolve` derives it,
/// given `links`: every link of that kernel, as [`KernelPartials::link_effects`] returns them
/// for `rule`. Returns `∂f/∂C[from][to]` per link, in the order of `links`.
///
/// Row `i` of the kernel comes from the weights `w_il = C[from][to]` of its links (`C[i][l]`
/// for birth-death, `C[l][i]` for death-birth and Wright-Fisher). With
/// `E_il = ∂f/∂K_il − ∂f/∂K_ii` (the link effects):
///
/// * `retention = None` (`self_flows: keep`), `K_il = w_il / S_i`, `S_i = sum_l w_il`:
///   `∂f/∂w_ij = (E_ij − sum_{l≠i} K_il E_il) / S_i`;
/// * `retention = Some(p)`, `K_ii = p`, `K_il = (1 − p) w_il / O_i`, `O_i = sum_{l≠i} w_il`:
///   `∂f/∂w_ij = (1 − p) / O_i · (E_ij − sum_{l≠i} K_il E_il / (1 − p))`.
///
/// Both follow from `∂f/∂w_ij = sum_l ∂f/∂K_il ∂K_il/∂w_ij` and `sum_l K_il = 1` (derived
/// here). A diagonal flow is not a link and has no entry.
pub fn flow_effects(
    links: &[LinkEffect],
    kernel: &StochasticMatrix,
    flows: &[Vec<f64>],
    retention: Option<f64>,
    rule: Rule,
) -> Vec<f64> {
    let m = kernel.dim();
    let weight = |i: usize, l: usize| match rule {
        Rule::BirthDeath => flows[i][l],
        Rule::DeathBirth | Rule::WrightFisher => flows[l][i],
    };
    let moving = retention.map_or(1.0, |p| 1.0 - p);
    let denominator: Vec<f64> = (0..m)
        .map(|i| {
            (0..m)
                .filter(|&l| retention.is_none() || l != i)
                .map(|l| weight(i, l))
                .sum()
        })
        .collect();
    let mut mean_effect = vec![0.0; m];
    for link in links {
        mean_effect[link.row] += kernel.get(link.row, link.col) * link.derivative;
    }
    links
        .iter()
        .map(|link| {
            let i = link.row;
            if moving <= 0.0 || denominator[i] <= 0.0 {
                return 0.0;
            }
            moving / denominator[i] * (link.derivative - mean_effect[i] / moving)
        })
        .collect()
}
