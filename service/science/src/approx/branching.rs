//! Multi-type branching (establishment) probability of a single variant, types = demes.
//!
//! # The offspring law of each rule
//! While a variant lineage is rare in every deme (`k_i ≪ n_i`), its members reproduce and die
//! independently of each other at the rates the model's event probabilities give at a count
//! vector with one variant (`Model::event_probabilities` at `k = e_j`), taken in the large-deme
//! limit `n_i → ∞` at fixed kernel and `r = 1 + s`. Per generation (`N` events for the Moran-type
//! rules), a variant in deme `j` gives birth to a variant in deme `i` at rate `β_ji` and dies at
//! rate `d_j`:
//!
//! * death-birth: deme `i` loses `n_i` individuals per generation, each vacancy recruits from
//!   deme `j` with probability `B_ij` and picks the variant with probability `r / (r + n_j - 1)
//!   → r / n_j`, so `β_ji = r n_i B_ij / n_j`; the variant itself dies at rate `d_j = 1`;
//! * birth-death: the variant reproduces at rate `r N / W → r`, its offspring settles in `l`
//!   with probability `F_jl`, so `β_jl = r F_jl`; it is replaced whenever a (resident) parent's
//!   offspring lands on it, at rate `d_j = T_j = sum_a n_a F_aj / n_j` (the deme's temperature);
//! * Wright-Fisher: each of the `n_i` newborns of deme `i` picks the variant of deme `j` as
//!   parent with probability `B_ij r / (r + n_j - 1)`, independently, so the variant leaves
//!   `Binomial(n_i, ·) → Poisson(A_ji)` offspring in deme `i`, `A_ji = r n_i B_ij / n_j`,
//!   independent over `i`, and dies (generations do not overlap).
//!
//! Both selection scopes give the same limit: under `neighbourhood` scope the competition
//! denominator of a vacancy is `1 + O(k / n)`. The scope only matters at order `1/n_i`.
//!
//! For the Moran-type rules, a lineage in continuous time with birth rates `β_ji` and death rate
//! `d_j` has the same extinction probabilities as its embedded "lifetime" Galton-Watson process:
//! over an exponential lifetime of rate `d_j` the births are Poisson with mean `A_ji t`, so the
//! number of offspring has pgf `g_j(z) = 1 / (1 + sum_i A_ji (1 - z_i))`, `A_ji = β_ji / d_j`
//! (a multivariate geometric law, [`OffspringLaw::Geometric`]). Wright-Fisher gives
//! `g_j(z) = exp(-sum_i A_ji (1 - z_i))` ([`OffspringLaw::Poisson`]). With `q = 1 - Q`, the
//! survival probabilities solve
//!
//! * geometric: `q_j = x_j / (1 + x_j)`, Poisson: `q_j = 1 - exp(-x_j)`, with `x = A q`,
//!
//! and `q` is the maximal solution in `[0, 1]^m` (`Q` the minimal fixed point of `Q = g(Q)`).
//! On one deme these are `q = 1 - 1/r` (the large-`N` Moran limit) and the Poisson(`r`)
//! Galton-Watson survival `1 - q = e^{-r q}` of references.md §2.2 (Haldane 1927, from memory).
//!
//! # Criticality
//! The mean matrix has Perron root exactly `r`: death-birth and Wright-Fisher have the positive
//! left eigenvector `u_j = n_j` (`sum_j n_j A_ji = r n_i sum_j B_ij = r n_i`) and right
//! eigenvector `h_i = ν_i / n_i` (ν the left Perron vector of `B`); birth-death has
//! `u_j = n_j T_j` (`sum_j n_j T_j r F_jl / T_j = r n_l T_l`). So `λ - 1 = s` for every kernel
//! (references.md §6.2).
//!
//! # Solver
//! From `q = 1` a few plain iterations `q ← φ(A q)` (monotone from above), then Newton on
//! `q - φ(A q) = 0` with the sparse Jacobian `I - diag(φ'(A q)) A` factorised by faer's sparse LU;
//! from above the Newton iterates decrease monotonically to the maximal fixed point and converge
//! quadratically. The same code solves the general form `q = L₂ φ(L₁ q)`, which also covers the
//! "migrate, then reproduce Poisson(λ_j)" process of references.md §6.2 ([`migrate_then_poisson`]).
//!
//! # Gradient
//! For `f = sum_k w_k q_k`: one adjoint solve `(I - J)^T λ = w`, `J = L₂ D L₁`,
//! `D = diag(φ'(L₁ q))`, then `∂f/∂(L₂)_jk = λ_j φ(L₁ q)_k` and `∂f/∂(L₁)_ki = μ_k q_i` with
//! `μ = D L₂^T λ`, mapped to the kernel entries by the chain rule (`A_ji = r n_i B_ij / n_j`;
//! `A_jl = r F_jl / T_j`, `T_j = sum_a n_a F_aj / n_j`): `O(nnz)` after the solve.

use super::linear::solve_triplets;
use super::{check_len, structural_entries, ApproxError, Limit, ValidRegime};
use crate::migration::StochasticMatrix;
use crate::model::{Model, Rule};
use crate::sensitivity::KernelPartials;

/// Largest accepted `max_i 1 / (n_i s)`: the lineage must be able to establish (reach about
/// `1/s` copies) while still rare in the demes it grows in, which needs `n_i s` well above 1.
/// At `n_i s = 5` the single-deme Moran value differs from `1 - 1/r` by `e^{-5} ≈ 0.7%`.
pub const MAX_INVERSE_LOCAL_SELECTION: f64 = 0.2;

/// Largest accepted `max_i s / n_i`: the single-variant rates differ from their large-deme
/// limits by a relative `O(s / n_i)` (for example `r / (r + n_j - 1)` against `r / n_j`).
pub const MAX_RATE_ERROR: f64 = 0.05;

/// Plain iterations before Newton.
const PLAIN_ITERATIONS: usize = 20;
/// Newton steps allowed.
const NEWTON_STEPS: usize = 100;
/// Convergence: `max |Δq| <= NEWTON_TOLERANCE * max q`.
const NEWTON_TOLERANCE: f64 = 1e-14;
/// Accepted final residual `max |q - G(q)|` relative to `max q`.
const ACCEPTED_RESIDUAL: f64 = 1e-10;

/// Accepted relative residual of the adjoint solve.
const ADJOINT_RESIDUAL: f64 = 1e-11;

/// The lifetime offspring law of a lineage member, given its mean offspring numbers `A_j·`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum OffspringLaw {
    /// Independent Poisson numbers per deme: `g(z) = exp(-sum_i A_i (1 - z_i))`.
    Poisson,
    /// Multivariate geometric (Moran-type rules): `g(z) = 1 / (1 + sum_i A_i (1 - z_i))`.
    Geometric,
}

impl OffspringLaw {
    /// `φ(x)`, the survival probability of a parent whose offspring carry total survival mass
    /// `x = sum_i A_i q_i`.
    fn phi(self, x: f64) -> f64 {
        match self {
            OffspringLaw::Poisson => -(-x).exp_m1(),
            OffspringLaw::Geometric => x / (1.0 + x),
        }
    }

    /// `φ'(x)`.
    fn dphi(self, x: f64) -> f64 {
        match self {
            OffspringLaw::Poisson => (-x).exp(),
            OffspringLaw::Geometric => 1.0 / ((1.0 + x) * (1.0 + x)),
        }
    }
}

/// A square sparse matrix in compressed rows.
#[derive(Debug, Clone, PartialEq)]
struct Csr {
    start: Vec<usize>,
    col: Vec<usize>,
    val: Vec<f64>,
}

impl Csr {
    fn from_rows(rows: impl Iterator<Item = Vec<(usize, f64)>>) -> Self {
        let mut start = vec![0];
        let (mut col, mut val) = (Vec::new(), Vec::new());
        for row in rows {
            for (c, v) in row {
                col.push(c);
                val.push(v);
            }
            start.push(col.len());
        }
        Self { start, col, val }
    }

    fn dim(&self) -> usize {
        self.start.len() - 1
    }

    fn row(&self, i: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        let r = self.start[i]..self.start[i + 1];
        self.col[r.clone()]
            .iter()
            .copied()
            .zip(self.val[r].iter().copied())
    }

    fn apply(&self, x: &[f64], out: &mut [f64]) {
        for (i, o) in out.iter_mut().enumerate() {
            *o = self.row(i).map(|(j, v)| v * x[j]).sum();
        }
    }

    fn apply_transpose(&self, x: &[f64], out: &mut [f64]) {
        out.iter_mut().for_each(|o| *o = 0.0);
        for (i, &xi) in x.iter().enumerate() {
            for (j, v) in self.row(i) {
                out[j] += v * xi;
            }
        }
    }
}

/// The fixed-point problem `q = L₂ φ(L₁ q)` (`L₂ = I` when `outer` is `None`).
struct System {
    inner: Csr,
    outer: Option<Csr>,
    law: OffspringLaw,
}

/// The maximal fixed point and what the solver did.
struct Solved {
    q: Vec<f64>,
    /// `x = L₁ q`.
    x: Vec<f64>,
    newton_steps: usize,
    residual: f64,
}

impl System {
    fn dim(&self) -> usize {
        self.inner.dim()
    }

    /// `G(q)`, also returning `x = L₁ q`.
    fn map(&self, q: &[f64], x: &mut [f64], out: &mut [f64]) {
        self.inner.apply(q, x);
        match &self.outer {
            None => {
                for (o, &xi) in out.iter_mut().zip(x.iter()) {
                    *o = self.law.phi(xi);
                }
            }
            Some(outer) => {
                let y: Vec<f64> = x.iter().map(|&v| self.law.phi(v)).collect();
                outer.apply(&y, out);
            }
        }
    }

    /// Triplets of `I - L₂ D L₁`, `D = diag(d)`.
    fn jacobian(&self, d: &[f64]) -> Vec<(usize, usize, f64)> {
        let m = self.dim();
        let mut t: Vec<(usize, usize, f64)> = (0..m).map(|i| (i, i, 1.0)).collect();
        match &self.outer {
            None => {
                for (j, &dj) in d.iter().enumerate() {
                    for (i, a) in self.inner.row(j) {
                        t.push((j, i, -dj * a));
                    }
                }
            }
            Some(outer) => {
                for j in 0..m {
                    for (k, b) in outer.row(j) {
                        for (i, a) in self.inner.row(k) {
                            t.push((j, i, -b * d[k] * a));
                        }
                    }
                }
            }
        }
        t
    }

    fn dphi_at(&self, x: &[f64]) -> Vec<f64> {
        x.iter().map(|&v| self.law.dphi(v)).collect()
    }

    fn solve(&self) -> Result<Solved, ApproxError> {
        let m = self.dim();
        let mut q = vec![1.0; m];
        let mut x = vec![0.0; m];
        let mut next = vec![0.0; m];
        for _ in 0..PLAIN_ITERATIONS {
            self.map(&q, &mut x, &mut next);
            std::mem::swap(&mut q, &mut next);
        }
        let mut newton_steps = 0;
        loop {
            self.map(&q, &mut x, &mut next);
            let scale = q.iter().fold(0.0f64, |a, &b| a.max(b));
            if scale < f64::MIN_POSITIVE {
                // The lineage dies out from every deme.
                q.iter_mut().for_each(|v| *v = 0.0);
                self.map(&q, &mut x, &mut next);
                return Ok(Solved {
                    q,
                    x,
                    newton_steps,
                    residual: 0.0,
                });
            }
            if newton_steps == NEWTON_STEPS {
                let residual = residual_of(&q, &next) / scale;
                return Err(ApproxError::NotConverged { residual });
            }
            let rhs: Vec<f64> = next.iter().zip(&q).map(|(g, v)| g - v).collect();
            let d = self.dphi_at(&x);
            let delta = solve_triplets(m, &self.jacobian(&d), &rhs, false, 1e-12, false).ok_or(
                ApproxError::NotConverged {
                    residual: residual_of(&q, &next) / scale,
                },
            )?;
            newton_steps += 1;
            let mut change = 0.0f64;
            for (v, dv) in q.iter_mut().zip(&delta) {
                let new = (*v + dv).clamp(0.0, 1.0);
                change = change.max((new - *v).abs());
                *v = new;
            }
            if !change.is_finite() {
                return Err(ApproxError::NotConverged {
                    residual: f64::INFINITY,
                });
            }
            if change <= NEWTON_TOLERANCE * scale {
                self.map(&q, &mut x, &mut next);
                let residual = residual_of(&q, &next) / scale;
                if residual > ACCEPTED_RESIDUAL {
                    return Err(ApproxError::NotConverged { residual });
                }
                self.inner.apply(&q, &mut x);
                return Ok(Solved {
                    q,
                    x,
                    newton_steps,
                    residual,
                });
            }
        }
    }

    /// Adjoint of `f = w · q` at the solution: `μ = D L₂^T λ` with `(I - J)^T λ = w`, so
    /// that `∂f/∂(L₁)_ki = μ_k q_i` (the only factor the rules' kernels enter through).
    fn adjoint(&self, solved: &Solved, w: &[f64]) -> Result<Vec<f64>, ApproxError> {
        let m = self.dim();
        let d = self.dphi_at(&solved.x);
        let triplets = self.jacobian(&d);
        let lambda = solve_triplets(m, &triplets, w, true, ADJOINT_RESIDUAL, false)
            .ok_or(ApproxError::SingularAdjoint)?;
        let mu = match &self.outer {
            None => lambda.iter().zip(&d).map(|(l, dk)| l * dk).collect(),
            Some(outer) => {
                let mut t = vec![0.0; m];
                outer.apply_transpose(&lambda, &mut t);
                t.iter().zip(&d).map(|(v, dk)| v * dk).collect()
            }
        };
        Ok(mu)
    }
}

fn residual_of(q: &[f64], g: &[f64]) -> f64 {
    q.iter()
        .zip(g)
        .fold(0.0f64, |a, (x, y)| a.max((x - y).abs()))
}

/// Establishment probabilities of a single variant per start deme, with the regime.
#[derive(Debug, Clone, PartialEq)]
pub struct Branching {
    /// `q_k`: probability that a lineage founded by one variant in deme `k` never dies out.
    pub per_deme: Vec<f64>,
    /// `λ - 1`, with `λ = r` the Perron root of the mean offspring matrix.
    pub criticality: f64,
    /// The offspring law of the rule.
    pub law: OffspringLaw,
    /// Newton steps taken.
    pub newton_steps: usize,
    /// Final `max |q - G(q)| / max q`.
    pub residual: f64,
    /// Where the approximation holds.
    pub regime: ValidRegime,
    /// `x = A q`, kept for the gradient.
    survival_mass: Vec<f64>,
    /// Identity of the model, checked by [`Branching::gradient`].
    rule: Rule,
    fitness: f64,
}

impl Branching {
    /// `sum_k w_k q_k` for start weights `w` (see [`crate::Start::deme_weights`]).
    pub fn combine(&self, weights: &[f64]) -> f64 {
        weights.iter().zip(&self.per_deme).map(|(w, q)| w * q).sum()
    }

    /// Raw partials `∂f/∂K_ij` of `f = sum_k w_k q_k` with respect to the kernel of `model`,
    /// which must be the model this answer was computed for. One sparse LU and one transposed
    /// solve, then `O(nnz)`.
    pub fn gradient(&self, model: &Model, weights: &[f64]) -> Result<KernelPartials, ApproxError> {
        let m = model.demes();
        check_len(m, weights.len())?;
        if m != self.per_deme.len() || model.rule() != self.rule || model.fitness() != self.fitness
        {
            return Err(ApproxError::ModelMismatch);
        }
        let entries = structural_entries(model.kernel());
        if self.per_deme.iter().all(|&q| q == 0.0) {
            return Ok(KernelPartials {
                demes: m,
                entries: entries.into_iter().map(|(i, j)| (i, j, 0.0)).collect(),
            });
        }
        let layout = MeanLayout::new(model)?;
        let system = System {
            inner: layout.mean.clone(),
            outer: None,
            law: self.law,
        };
        let solved = Solved {
            q: self.per_deme.clone(),
            x: self.survival_mass.clone(),
            newton_steps: self.newton_steps,
            residual: self.residual,
        };
        let mu = system.adjoint(&solved, weights)?;
        let q = &self.per_deme;
        let n: Vec<f64> = model.sizes().iter().map(|&v| v as f64).collect();
        let r = model.fitness();
        let values = match model.rule() {
            Rule::DeathBirth | Rule::WrightFisher => entries
                .into_iter()
                // A_ji = r n_i B_ij / n_j.
                .map(|(i, j)| (i, j, mu[j] * q[i] * r * n[i] / n[j]))
                .collect(),
            Rule::BirthDeath => {
                let t = &layout.turnover;
                // ∂f/∂F_ab = r μ_a q_b / T_a - (n_a / n_b) μ_b x_b / T_b.
                let g: Vec<f64> = (0..m)
                    .map(|b| mu[b] * self.survival_mass[b] / (t[b] * n[b]))
                    .collect();
                entries
                    .into_iter()
                    .map(|(a, b)| (a, b, r * mu[a] * q[b] / t[a] - n[a] * g[b]))
                    .collect()
            }
        };
        Ok(KernelPartials {
            demes: m,
            entries: values,
        })
    }
}

/// The mean offspring matrix of a rule and the per-deme death rates behind it.
struct MeanLayout {
    /// Row `j`: `(i, A_ji)`.
    mean: Csr,
    /// Death rate per generation of a variant in each deme (1 for death-birth and
    /// Wright-Fisher, the temperature `T_j` for birth-death).
    turnover: Vec<f64>,
}

impl MeanLayout {
    fn new(model: &Model) -> Result<Self, ApproxError> {
        let m = model.demes();
        let k = model.kernel();
        let n: Vec<f64> = model.sizes().iter().map(|&v| v as f64).collect();
        let r = model.fitness();
        match model.rule() {
            Rule::DeathBirth | Rule::WrightFisher => Ok(Self {
                mean: Csr::from_rows(
                    (0..m).map(|j| k.col(j).map(|(i, b)| (i, r * n[i] * b / n[j])).collect()),
                ),
                turnover: vec![1.0; m],
            }),
            Rule::BirthDeath => {
                let t = temperature(k, &n);
                if let Some(deme) = t.iter().position(|&v| v <= 0.0) {
                    return Err(ApproxError::NeverReplaced { deme });
                }
                Ok(Self {
                    mean: Csr::from_rows(
                        (0..m).map(|j| k.row(j).map(|(l, f)| (l, r * f / t[j])).collect()),
                    ),
                    turnover: t,
                })
            }
        }
    }
}

/// Temperature `T_j = sum_a n_a F_aj / n_j` of each deme under a dispersal kernel.
pub(crate) fn temperature(f: &StochasticMatrix, n: &[f64]) -> Vec<f64> {
    (0..f.dim())
        .map(|j| f.col(j).map(|(a, v)| n[a] * v).sum::<f64>() / n[j])
        .collect()
}

/// The rule's lifetime offspring law.
pub fn offspring_law(rule: Rule) -> OffspringLaw {
    match rule {
        Rule::WrightFisher => OffspringLaw::Poisson,
        Rule::DeathBirth | Rule::BirthDeath => OffspringLaw::Geometric,
    }
}

/// Establishment probability of a single variant from each deme under the rule of `model`
/// (module docs: offspring laws, solver), with its [`ValidRegime`].
pub fn establishment(model: &Model) -> Result<Branching, ApproxError> {
    let m = model.demes();
    let s = model.fitness() - 1.0;
    let law = offspring_law(model.rule());
    let regime = regime(model);
    let (q, x, newton_steps, residual) = if s <= 0.0 {
        (vec![0.0; m], vec![0.0; m], 0, 0.0)
    } else {
        let layout = MeanLayout::new(model)?;
        let system = System {
            inner: layout.mean,
            outer: None,
            law,
        };
        let solved = system.solve()?;
        (solved.q, solved.x, solved.newton_steps, solved.residual)
    };
    Ok(Branching {
        per_deme: q,
        criticality: s,
        law,
        newton_steps,
        residual,
        regime,
        survival_mass: x,
        rule: model.rule(),
        fitness: model.fitness(),
    })
}

/// The regime of the branching approximation for `model`.
fn regime(model: &Model) -> ValidRegime {
    let s = model.fitness() - 1.0;
    let smallest = model.sizes().iter().copied().min().unwrap_or(1) as f64;
    let mut regime = ValidRegime::new("branching");
    regime.check(
        "criticality",
        s,
        Some(Limit::Above(0.0)),
        "the lineage is not supercritical (λ = r <= 1): establishment is 0 and fixation, if \
         any, happens by drift, which the branching process does not describe",
    );
    let inverse = if s > 0.0 {
        1.0 / (smallest * s)
    } else {
        f64::INFINITY
    };
    regime.check(
        "max_inverse_local_selection",
        inverse,
        Some(Limit::AtMost(MAX_INVERSE_LOCAL_SELECTION)),
        "some deme is too small for the variant to stay locally rare until it is established \
         (needs n_i s >= 5)",
    );
    regime.check(
        "max_rate_error",
        s.abs() / smallest,
        Some(Limit::AtMost(MAX_RATE_ERROR)),
        "the single-variant rates of some deme differ from their large-deme limits by more \
         than 5%",
    );
    regime
}

/// Survival probabilities of the process "migrate with the kernel, then reproduce
/// Poisson(`growth[j]`) in the destination `j`" (references.md §6.2; Barton et al. 2007,
/// *Evolution*, web note WN28): `q_i = sum_j K_ij (1 - exp(-growth_j q_j))`, the maximal
/// solution in `[0, 1]^m`. `q_i` is the survival of a lineage founded by one individual born
/// in deme `i` before it migrates.
pub fn migrate_then_poisson(
    kernel: &StochasticMatrix,
    growth: &[f64],
) -> Result<Vec<f64>, ApproxError> {
    let m = kernel.dim();
    check_len(m, growth.len())?;
    let system = System {
        inner: Csr::from_rows((0..m).map(|j| vec![(j, growth[j])])),
        outer: Some(Csr::from_rows((0..m).map(|i| kernel.row(i).collect()))),
        law: OffspringLaw::Poisson,
    };
    Ok(system.solve()?.q)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Scope;
    use crate::population::Population;

    fn islands(rule: Rule, sizes: Vec<u64>, s: f64) -> Model {
        let k = StochasticMatrix::from_weights(&[
            vec![0.8, 0.15, 0.05],
            vec![0.1, 0.7, 0.2],
            vec![0.02, 0.08, 0.9],
        ])
        .unwrap();
        Model::new(&Population::new(sizes).unwrap(), k, rule, Scope::Deme, s).unwrap()
    }

    #[test]
    fn the_rates_are_the_model_event_probabilities_at_one_variant_in_the_large_deme_limit() {
        // Birth and death rates of a single variant, per generation, from
        // `Model::event_probabilities` at k = e_j, against the limits of the module docs.
        let sizes = vec![2_000_000, 3_000_000, 1_000_000];
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            for scope in [Scope::Deme, Scope::Neighbourhood] {
                let model = islands(rule, sizes.clone(), 0.3);
                let model = Model::new(
                    &Population::new(sizes.clone()).unwrap(),
                    model.kernel().clone(),
                    rule,
                    scope,
                    0.3,
                )
                .unwrap();
                let layout = MeanLayout::new(&model).unwrap();
                let total = model.total() as f64;
                let (mut up, mut down) = (vec![0.0; 3], vec![0.0; 3]);
                for j in 0..3 {
                    let mut k = vec![0u64; 3];
                    k[j] = 1;
                    model.event_probabilities(&k, &mut up, &mut down);
                    let death = down[j] * total;
                    assert!((death / layout.turnover[j] - 1.0).abs() < 1e-5);
                    for (i, a) in layout.mean.row(j) {
                        let birth = up[i] * total;
                        let want = a * layout.turnover[j];
                        assert!((birth / want - 1.0).abs() < 1e-5, "{rule:?} {j}->{i}");
                    }
                }
            }
        }
    }

    #[test]
    fn one_deme_gives_the_moran_limit_and_the_poisson_galton_watson_survival() {
        // references.md §2.2: Poisson(1+s) survival (Haldane 1927 / Fisher 1922, from memory)
        // and the large-N Moran limit 1 - 1/r.
        let k = StochasticMatrix::from_weights(&[vec![1.0]]).unwrap();
        let pop = Population::new(vec![1000]).unwrap();
        for (s, want) in [(0.05, 0.0937018370729016), (0.2, 0.313698331041218)] {
            let wf = Model::new(&pop, k.clone(), Rule::WrightFisher, Scope::Deme, s).unwrap();
            let q = establishment(&wf).unwrap().per_deme[0];
            assert!((q - want).abs() < 1e-13, "{q} vs {want}");
            for rule in [Rule::DeathBirth, Rule::BirthDeath] {
                let model = Model::new(&pop, k.clone(), rule, Scope::Deme, s).unwrap();
                let q = establishment(&model).unwrap().per_deme[0];
                assert!((q - s / (1.0 + s)).abs() < 1e-14);
            }
        }
    }

    #[test]
    fn a_neutral_or_deleterious_variant_does_not_establish_and_is_outside_the_regime() {
        for s in [0.0, -0.1] {
            let b = establishment(&islands(Rule::DeathBirth, vec![100, 100, 100], s)).unwrap();
            assert!(b.per_deme.iter().all(|&q| q == 0.0));
            assert!(!b.regime.inside);
        }
    }
}
