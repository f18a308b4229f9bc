//! Nagylaki's strong-migration limit with Kimura's formula, per start deme.
//!
//! Source: Nagylaki T. (1980) "The strong-migration limit in geographically structured
//! populations", J. Math. Biol. 9:101-114 (references.md §6.1): when migration is fast against
//! selection and drift, every deme's variant frequency stays close to the
//! reproductive-value-weighted frequency `p̂`, which follows a panmictic diffusion with an
//! effective size `N_e` and an averaged selection coefficient. Its fixation probability is
//! Kimura's (1962, Genetics 47:713-719) `u(p) = (1 - e^{-a p}) / (1 - e^{-a})`
//! (references.md §2.1) with `a = 2 M / V · p(1-p)`-scaled drift-selection ratio below.
//!
//! # Derivation per rule (haploid, deme frequencies `p_i ≈ p̂ = p`)
//! Weights: per-individual reproductive value `h_i` (`ν_i = n_i h_i`, `sum ν_i = 1`), with
//! `p̂ = sum_i ν_i p_i` a martingale of the neutral chain (references.md §5.1):
//!
//! * death-birth and Wright-Fisher: `ν` is the left Perron vector of `B` (`ν B = ν`);
//! * birth-death: `h_i T_i = sum_j F_ij h_j`, `sum_i n_i h_i = 1`, `T_i = sum_l n_l F_li / n_i`.
//!
//! Per generation, with `p_i = p` everywhere:
//!
//! * Wright-Fisher: `E[Δp̂] = s p(1-p)` (`ν B = ν`), `Var[Δp̂] = sum_i ν_i² p(1-p) / n_i`;
//!   so `N_e = 1 / sum_i ν_i² / n_i` and `a = 2 N_e s` (Kimura's haploid form);
//! * death-birth (`N` events; deme `i` loses `n_i / N` per event): the mean is again
//!   `s p(1-p)` per generation, but each event moves `p̂` by `±ν_i / n_i` with total
//!   probability `2 p(1-p) n_i / N`, so `Var = 2 p(1-p) sum_i ν_i² / n_i`: twice the
//!   Wright-Fisher drift (Moran offspring variance 2). `a = N_e s'`;
//! * birth-death: the mean is `s p(1-p) sum_i ν_i T_i` and the variance
//!   `2 p(1-p) sum_i ν_i² T_i / n_i` per generation, so `N_e = 1 / sum_i ν_i² T_i / n_i`,
//!   effective selection `s̄ = s' sum_i ν_i T_i` and `a = N_e s̄` (conservative dispersal has
//!   `T = 1`, `ν_i = n_i / N`, hence `N_e = N`, `s̄ = s`).
//!
//! For the Moran-type rules `s' = ln r`: on one deme `u(1/N)` is then exactly Moran's
//! `(1 - 1/r) / (1 - 1/r^N)` (references.md §1.1 identity). Wright-Fisher keeps Kimura's `s`.
//! The single variant in deme `k` starts at `p̂ = ν_k / n_k = h_k`.
//! Conservative migration gives `N_e = N`; otherwise `N_e < N` (Cauchy-Schwarz, §6.1).
//! Both selection scopes give the same diffusion (with equal deme frequencies the neighbourhood
//! denominator is the deme one).
//!
//! # Regime
//! [`ValidRegime`] indicators: `ne_s` (shown), `selection` (`|s| <= MAX_SELECTION`),
//! `min_emigration_over_selection`, `min_migrants`, and, once the exact first-order
//! coefficients of the same model are at hand, `first_order_error`
//! ([`StrongMigration::check_first_order`]): the limit's estimated relative error from
//! related copies within demes, the one that matters on real matrices with small demes.
//!
//! # Gradient
//! The reproductive values solve `L x = 0`, `a·x = 1`, with `L = (I - B)^T`, `a = 1` (death-
//! birth, Wright-Fisher) or `L = diag(T) - F`, `a = n` (birth-death); one sparse LU of `L` with
//! row `r` replaced by `e_r^T` gives `x`. For `f = sum_k w_k u_k`, with `c = ∂f/∂x`, one
//! transposed solve gives `y` with `L^T y = c - (c·x) a`, and `df = -y^T (dL) x` (plus the
//! explicit dependence of `N_e` and `s̄` on `T` for birth-death): `∂f/∂B_ab = ν_a y_b`;
//! `∂f/∂F_ab = y_a h_b + (n_a / n_b)(G_b - y_b h_b)` with `G_b = ∂f/∂T_b` at fixed `h`.

use super::linear::solve_triplets;
use super::{check_len, structural_entries, ApproxError, Limit, ValidRegime};
use crate::model::{Model, Rule};
use crate::sensitivity::KernelPartials;
use crate::weak::WeakSelection;

/// Largest `|s|` accepted: the diffusion needs small per-generation changes; at `s = 0.1`
/// Kimura's formula is about 3% above the exact single-deme Wright-Fisher chain
/// (references.md §2.1 table).
pub const MAX_SELECTION: f64 = 0.1;

/// Smallest accepted `min_i (1 - K_ii) / |s|`: a lineage must leave its deme many times while
/// selection changes its frequency, so that deme frequencies stay close to `p̂`.
pub const MIN_EMIGRATION_OVER_SELECTION: f64 = 10.0;

/// Smallest accepted `min_i n_i (1 - K_ii)`, migrants per generation (Wright's `n m`): below
/// it local drift makes deme frequencies differ from `p̂`.
pub const MIN_MIGRANTS: f64 = 5.0;

/// Largest accepted [`StrongMigration::check_first_order`] estimate of the limit's relative
/// error. The limit takes every deme's frequency equal to `p̂`; within small demes the
/// variant's copies are related (identical by descent), which changes the selection they
/// feel, and the exact first-order coefficient counts that. Measured against the exact chain
/// on the 3-deme cases of `tests/approximations.rs` (estimate, then actual error): death-birth
/// 10/12/14 individuals at s = 0.05: 3.4% and 3.9%, and every case there within -0.2% to
/// +3% of its actual error; on a real 16-group age-contact matrix at 200 individuals,
/// s = 0.03: 6.5%, where the limit lies 0.1-16% (7% from a uniform start) above
/// 100,000-replicate ensembles (`tests/real_matrix.rs`).
pub const MAX_FIRST_ORDER_ERROR: f64 = 0.05;

/// Accepted relative residual of the reproductive-value solves.
const ACCEPTED_RESIDUAL: f64 = 1e-11;

/// Fixation probabilities in the strong-migration limit, per start deme, with the regime.
#[derive(Debug, Clone, PartialEq)]
pub struct StrongMigration {
    /// `u_k` for one variant starting in deme `k`.
    pub per_deme: Vec<f64>,
    /// Deme reproductive values `ν` (sum 1): the neutral fixation probability from deme `k`
    /// is `ν_k / n_k`.
    pub reproductive_values: Vec<f64>,
    /// `N_e` of the weighted-frequency diffusion (module docs).
    pub effective_size: f64,
    /// Effective selection coefficient (`s` for Wright-Fisher, `ln r` for death-birth,
    /// `ln r sum ν_i T_i` for birth-death).
    pub effective_selection: f64,
    /// Kimura's exponent `a` with `u(p) = (1 - e^{-a p}) / (1 - e^{-a})`: `2 N_e s` for
    /// Wright-Fisher, `N_e s̄` for the Moran-type rules.
    pub scaled_selection: f64,
    /// Where the approximation holds.
    pub regime: ValidRegime,
    /// `x`: `ν` (death-birth, Wright-Fisher) or `h` (birth-death).
    solution: Vec<f64>,
    /// Start frequencies `p̂` of a single variant per deme (`ν_k / n_k`, or `h_k`).
    start: Vec<f64>,
    /// `da/ds` at `s = 0`: `2 N_e` (Wright-Fisher), `N_e` (death-birth),
    /// `N_e sum_i ν_i T_i` (birth-death).
    exponent_slope: f64,
    rule: Rule,
    fitness: f64,
}

/// Kimura's `u(p) = (1 - e^{-a p}) / (1 - e^{-a})`, without overflow for any sign of `a`.
pub fn kimura(a: f64, p: f64) -> f64 {
    if a.abs() < 1e-12 {
        p
    } else if a > 0.0 {
        (-a * p).exp_m1() / (-a).exp_m1()
    } else {
        (a * (1.0 - p)).exp() * (a * p).exp_m1() / a.exp_m1()
    }
}

/// `∂u/∂p`.
fn kimura_dp(a: f64, p: f64) -> f64 {
    if a.abs() < 1e-12 {
        1.0
    } else if a > 0.0 {
        a * (-a * p).exp() / -(-a).exp_m1()
    } else {
        a * (a * (1.0 - p)).exp() / a.exp_m1()
    }
}

/// `∂u/∂a`.
fn kimura_da(a: f64, p: f64) -> f64 {
    if a.abs() < 1e-6 {
        kimura(a, p) * ((1.0 - p) / 2.0 + a * (p * p - 1.0) / 12.0)
    } else {
        kimura(a, p) * (p / (a * p).exp_m1() - 1.0 / a.exp_m1())
    }
}

/// The reproductive-value system of a model.
struct Reproductive {
    /// `x` with `L x = 0`, `a·x = 1`.
    x: Vec<f64>,
    /// The normalisation weights `a`.
    a: Vec<f64>,
    /// Temperature (birth-death) or ones.
    turnover: Vec<f64>,
    triplets: Vec<(usize, usize, f64)>,
}

impl Reproductive {
    fn new(model: &Model) -> Result<Self, ApproxError> {
        let m = model.demes();
        let k = model.kernel();
        let n: Vec<f64> = model.sizes().iter().map(|&v| v as f64).collect();
        // Replace the equation of the largest deme (most reproductive value, typically).
        let r = (0..m).fold(0, |best, i| if n[i] > n[best] { i } else { best });
        let mut triplets = Vec::with_capacity(k.nnz() + m);
        let (a, turnover) = match model.rule() {
            Rule::DeathBirth | Rule::WrightFisher => {
                for i in 0..m {
                    for (j, v) in k.row(i) {
                        // L_ji = δ_ji - B_ij.
                        if j != r {
                            triplets.push((j, i, -v));
                        }
                    }
                    if i != r {
                        triplets.push((i, i, 1.0));
                    }
                }
                (vec![1.0; m], vec![1.0; m])
            }
            Rule::BirthDeath => {
                let t = super::branching::temperature(k, &n);
                for (i, &ti) in t.iter().enumerate() {
                    if i == r {
                        continue;
                    }
                    for (j, v) in k.row(i) {
                        triplets.push((i, j, -v));
                    }
                    triplets.push((i, i, ti));
                }
                (n.clone(), t)
            }
        };
        triplets.push((r, r, 1.0));
        let mut rhs = vec![0.0; m];
        rhs[r] = 1.0;
        let y = solve_triplets(m, &triplets, &rhs, false, ACCEPTED_RESIDUAL, false)
            .ok_or(ApproxError::NoReproductiveValue)?;
        let norm: f64 = y.iter().zip(&a).map(|(v, w)| v * w).sum();
        let x: Vec<f64> = y.iter().map(|v| v / norm).collect();
        if x.iter().any(|&v| v <= 0.0 || !v.is_finite()) {
            return Err(ApproxError::NoReproductiveValue);
        }
        Ok(Self {
            x,
            a,
            turnover,
            triplets,
        })
    }
}

/// Strong-migration fixation probability of a single variant from each deme (module docs),
/// with its [`ValidRegime`]. Fails when the kernel has no unique positive reproductive value.
pub fn fixation(model: &Model) -> Result<StrongMigration, ApproxError> {
    let rv = Reproductive::new(model)?;
    Ok(from_parts(model, &rv))
}

fn selection_parts(model: &Model) -> (f64, f64) {
    // (s' entering the mean, drift multiplier c: a = c N_e s̄ ... folded as below)
    let r = model.fitness();
    match model.rule() {
        Rule::WrightFisher => (r - 1.0, 2.0),
        Rule::DeathBirth | Rule::BirthDeath => (r.ln(), 1.0),
    }
}

/// `(ν, N_e, s̄, a, p)` from the reproductive-value solution, and `da/ds` at `s = 0`.
struct Summary {
    nu: Vec<f64>,
    ne: f64,
    sbar: f64,
    a: f64,
    start: Vec<f64>,
    exponent_slope: f64,
}

fn summarise(model: &Model, rv: &Reproductive) -> Summary {
    let n: Vec<f64> = model.sizes().iter().map(|&v| v as f64).collect();
    let (s1, c) = selection_parts(model);
    match model.rule() {
        Rule::DeathBirth | Rule::WrightFisher => {
            let nu = rv.x.clone();
            let sum: f64 = nu.iter().zip(&n).map(|(v, ni)| v * v / ni).sum();
            let ne = 1.0 / sum;
            let start = nu.iter().zip(&n).map(|(v, ni)| v / ni).collect();
            Summary {
                nu,
                ne,
                sbar: s1,
                a: c * ne * s1,
                start,
                exponent_slope: c * ne,
            }
        }
        Rule::BirthDeath => {
            let h = &rv.x;
            let t = &rv.turnover;
            let nu: Vec<f64> = h.iter().zip(&n).map(|(v, ni)| v * ni).collect();
            let sum: f64 = (0..n.len()).map(|i| n[i] * h[i] * h[i] * t[i]).sum();
            let weight: f64 = (0..n.len()).map(|i| nu[i] * t[i]).sum();
            let ne = 1.0 / sum;
            let sbar = s1 * weight;
            Summary {
                nu,
                ne,
                sbar,
                a: c * ne * sbar,
                start: h.clone(),
                exponent_slope: c * ne * weight,
            }
        }
    }
}

fn from_parts(model: &Model, rv: &Reproductive) -> StrongMigration {
    let sum = summarise(model, rv);
    let per_deme = sum.start.iter().map(|&p| kimura(sum.a, p)).collect();
    StrongMigration {
        per_deme,
        reproductive_values: sum.nu,
        effective_size: sum.ne,
        effective_selection: sum.sbar,
        scaled_selection: sum.a,
        regime: regime(model, sum.ne * sum.sbar),
        solution: rv.x.clone(),
        start: sum.start,
        exponent_slope: sum.exponent_slope,
        rule: model.rule(),
        fitness: model.fitness(),
    }
}

fn regime(model: &Model, ne_s: f64) -> ValidRegime {
    let s = model.fitness() - 1.0;
    let k = model.kernel();
    let mut regime = ValidRegime::new("strong_migration");
    regime.check("ne_s", ne_s, None, "");
    regime.check(
        "selection",
        s.abs(),
        Some(Limit::AtMost(MAX_SELECTION)),
        "selection is too strong for a diffusion approximation",
    );
    let emigration = (0..model.demes())
        .map(|i| 1.0 - k.get(i, i))
        .fold(f64::INFINITY, f64::min);
    let ratio = if s == 0.0 {
        f64::INFINITY
    } else {
        emigration / s.abs()
    };
    regime.check(
        "min_emigration_over_selection",
        ratio,
        Some(Limit::AtLeast(MIN_EMIGRATION_OVER_SELECTION)),
        "some deme keeps its lineages too long against selection: deme frequencies separate \
         from the weighted mean",
    );
    let migrants = (0..model.demes())
        .map(|i| model.sizes()[i] as f64 * (1.0 - k.get(i, i)))
        .fold(f64::INFINITY, f64::min);
    regime.check(
        "min_migrants",
        migrants,
        Some(Limit::AtLeast(MIN_MIGRANTS)),
        "some deme exchanges too few migrants per generation: local drift separates its \
         frequency from the weighted mean",
    );
    regime
}

impl StrongMigration {
    /// The limit's first-order term per start deme, `du_k/ds` at `s = 0`: Kimura's
    /// `∂u/∂a = p(1 - p)/2` at `a = 0` times `da/ds` (`s' = ln r` and `s` agree to first
    /// order).
    pub fn first_order_slopes(&self) -> Vec<f64> {
        self.start
            .iter()
            .map(|&p| self.exponent_slope * p * (1.0 - p) / 2.0)
            .collect()
    }

    /// Adds the indicator `first_order_error` to the regime: over start demes `k` with a
    /// positive exact first-order coefficient `rho'_k` (`weak`, computed for the same model),
    /// the largest `|slope_k / rho'_k - 1| · |u_k - p̂_k| / u_k`, limit
    /// [`MAX_FIRST_ORDER_ERROR`]. The first factor is how far the limit's first-order term
    /// is from the exact one: the two agree exactly when deme frequencies stay equal, so it
    /// measures how much local relatedness moves the selection the limit assumes; the second
    /// is the share of `u_k` that selection contributes, so the product estimates the
    /// relative error this causes at the model's `s`.
    ///
    /// # Errors
    /// [`ApproxError::Length`] when `weak` has another number of demes.
    pub fn check_first_order(&mut self, weak: &WeakSelection) -> Result<(), ApproxError> {
        check_len(self.start.len(), weak.slope.len())?;
        let largest = weak.slope.iter().fold(0.0_f64, |a, &b| a.max(b.abs()));
        let slopes = self.first_order_slopes();
        let error = (0..self.start.len())
            .filter(|&k| weak.slope[k] > 1e-9 * largest && self.per_deme[k] > 0.0)
            .map(|k| {
                let mismatch = (slopes[k] / weak.slope[k] - 1.0).abs();
                let selected = (self.per_deme[k] - self.start[k]).abs() / self.per_deme[k];
                mismatch * selected
            })
            .fold(0.0_f64, f64::max);
        self.regime.check(
            "first_order_error",
            error,
            Some(Limit::AtMost(MAX_FIRST_ORDER_ERROR)),
            "the limit's first-order term differs from the exact first-order coefficient: \
             related copies within demes change the selection the limit assumes",
        );
        Ok(())
    }

    /// `sum_k w_k u_k` for start weights `w`.
    pub fn combine(&self, weights: &[f64]) -> f64 {
        weights.iter().zip(&self.per_deme).map(|(w, u)| w * u).sum()
    }

    /// Raw partials `∂f/∂K_ij` of `f = sum_k w_k u_k` with respect to the kernel of `model`,
    /// which must be the model this answer was computed for (module docs: one LU, two solves,
    /// then `O(nnz)`).
    pub fn gradient(&self, model: &Model, weights: &[f64]) -> Result<KernelPartials, ApproxError> {
        let m = model.demes();
        check_len(m, weights.len())?;
        if m != self.per_deme.len() || model.rule() != self.rule || model.fitness() != self.fitness
        {
            return Err(ApproxError::ModelMismatch);
        }
        let rv = Reproductive::new(model)?;
        let sum = summarise(model, &rv);
        let n: Vec<f64> = model.sizes().iter().map(|&v| v as f64).collect();
        let (s1, c) = selection_parts(model);
        let a = sum.a;
        let ua: f64 = (0..m)
            .map(|k| weights[k] * kimura_da(a, sum.start[k]))
            .sum();
        let x = &rv.x;
        // c_vec = ∂f/∂x at fixed T; g_t = ∂f/∂T at fixed x (birth-death).
        let (cvec, g_t): (Vec<f64>, Vec<f64>) = match model.rule() {
            Rule::DeathBirth | Rule::WrightFisher => {
                let s_sum = 1.0 / sum.ne;
                let cvec = (0..m)
                    .map(|i| {
                        ua * (-a / s_sum) * 2.0 * x[i] / n[i]
                            + weights[i] * kimura_dp(a, sum.start[i]) / n[i]
                    })
                    .collect();
                (cvec, vec![0.0; m])
            }
            Rule::BirthDeath => {
                let t = &rv.turnover;
                let s_sum = 1.0 / sum.ne;
                let cvec = (0..m)
                    .map(|i| {
                        ua * (n[i] * t[i] / s_sum) * (c * s1 - 2.0 * a * x[i])
                            + weights[i] * kimura_dp(a, sum.start[i])
                    })
                    .collect();
                let g_t = (0..m)
                    .map(|i| ua * (n[i] * x[i] / s_sum) * (c * s1 - a * x[i]))
                    .collect();
                (cvec, g_t)
            }
        };
        let cx: f64 = cvec.iter().zip(x).map(|(u, v)| u * v).sum();
        let b: Vec<f64> = cvec.iter().zip(&rv.a).map(|(u, w)| u - cx * w).collect();
        // y_r = 0 by construction; the solve is of L^T y = b.
        let mut y = solve_triplets(m, &rv.triplets, &b, true, ACCEPTED_RESIDUAL, false)
            .ok_or(ApproxError::SingularAdjoint)?;
        let yx: f64 = y.iter().zip(x).map(|(u, v)| u * v).sum();
        y.iter_mut().zip(&rv.a).for_each(|(u, w)| *u -= yx * w);
        let entries = structural_entries(model.kernel());
        let values = match model.rule() {
            Rule::DeathBirth | Rule::WrightFisher => entries
                .into_iter()
                .map(|(i, j)| (i, j, x[i] * y[j]))
                .collect(),
            Rule::BirthDeath => entries
                .into_iter()
                .map(|(i, j)| (i, j, y[i] * x[j] + n[i] / n[j] * (g_t[j] - y[j] * x[j])))
                .collect(),
        };
        Ok(KernelPartials {
            demes: m,
            entries: values,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kimura_is_stable_and_its_derivatives_match_differences() {
        for &a in &[-50.0, -1.0, -1e-7, 0.0, 1e-7, 0.3, 5.0, 800.0] {
            for &p in &[1e-4, 0.01, 0.3] {
                let u = kimura(a, p);
                assert!(u.is_finite() && (0.0..=1.0).contains(&u), "{a} {p}");
                let h = 1e-6 * (1.0 + f64::abs(a));
                let da = (kimura(a + h, p) - kimura(a - h, p)) / (2.0 * h);
                assert!(
                    (da - kimura_da(a, p)).abs() < 1e-6 * (1.0 + da.abs()),
                    "{a} {p}"
                );
                let hp = 1e-7 * p;
                let dp = (kimura(a, p + hp) - kimura(a, p - hp)) / (2.0 * hp);
                assert!(
                    (dp - kimura_dp(a, p)).abs() < 1e-5 * (1.0 + dp.abs()),
                    "{a} {p}"
                );
            }
        }
    }
}
