//! First-order weak-selection expansion of fixation probabilities, and its gradient with
//! respect to the kernel.
//!
//! This module owns the coefficients of `rho_k(1 + s) = rho_k(1) + s rho'_k + O(s^2)` for a
//! single variant starting in deme `k` (in a uniformly random individual of deme `k`; by
//! exchangeability inside a deme, the same as any given individual of deme `k`), and the
//! partial derivatives of a start-weighted combination of them with respect to the kernel
//! entries ([`gradient`]), and the [`ValidRegime`](crate::approx::ValidRegime) where the
//! expansion can be trusted ([`regime`]).
//!
//! # Method
//! The reproductive-value-weighted variant frequency `x̂ = sum_a pi_a x_a` is a martingale of
//! the neutral chain and ends at 0 or 1, so `rho(s) = x̂_0 + sum_t E_s[Δx̂_t]`. Differentiating
//! at `s = 0` (the neutral increment has mean zero, so only the derivative of the one-step
//! mean counts) gives `rho' = sum_t E_0[d/ds E_s[Δx̂ | x_t]]`; that derivative is a linear
//! combination of pair quantities `1{x_b != x_c}`. Summed over neutral time they become
//! `Psi_ij`: the expected total time (events, or generations for Wright-Fisher) during which
//! two distinct individuals, one in deme `i` and one in deme `j`, carry different types. The
//! `Psi_ij` solve one linear system over unordered deme pairs, the neutral "two lineages"
//! recursion (references.md §5; Allen et al. 2017, Nature 544:227-230, and Allen et al. 2021,
//! PLoS Comput. Biol. 17:e1008695, approach). With `B` the recruitment matrix, `F` the
//! dispersal matrix, `n` the sizes, `N = sum n`, `nu` the left Perron vector of `B`:
//!
//! * death-birth: `2 Psi_ij - sum_l B_il (1 - δ_lj/n_j) Psi_lj - sum_l B_jl (1 - δ_li/n_i) Psi_il
//!   = N (δ_ik + δ_jk)/n_k`;
//!   * `deme` scope: `rho'_k = (1/N) sum_j nu_j (n_j - 1)/(2 n_j) Psi_jj`;
//!   * `neighbourhood` scope (every individual of deme `j` a candidate parent of a vacancy in
//!     `i` with weight `B_ij / n_j` times fitness):
//!     `rho'_k = (1/2N) sum_i nu_i sum_{j,l} B_ij B_il (1 - δ_jl/n_j) Psi_jl`;
//! * Wright-Fisher: `Psi_ij - sum_{l,m} B_il B_jm (1 - δ_lm/n_l) Psi_lm = (δ_ik + δ_jk)/n_k`;
//!   `deme` scope `rho'_k = sum_j nu_j (n_j - 1)/(2 n_j) Psi_jj`, `neighbourhood` scope
//!   `rho'_k = (1/2) sum_i nu_i sum_{j,l} B_ij B_il (1 - δ_jl/n_j) Psi_jl`;
//! * birth-death, on the individual-level graph `p_ab = F_{d(a) d(b)} / n_{d(b)}` lumped by
//!   deme, with temperature `T_i = sum_l n_l F_li / n_i` and per-individual reproductive value
//!   `w` (`w_i T_i = sum_l F_il w_l`, `sum_i n_i w_i = 1`):
//!   `(T_i + T_j) Psi_ij - sum_l [F_li (n_l - δ_lj)/n_i Psi_lj + F_lj (n_l - δ_li)/n_j Psi_il]
//!   = N (δ_ik + δ_jk)/n_k`, and `rho'_k = (1/2N) sum_{i,l} F_li w_i (n_l - δ_il) Psi_li`.
//!
//! The neutral term is `nu_k / n_k` (death-birth, Wright-Fisher) or `w_k` (birth-death).
//! `Psi_ii` does not exist when `n_i = 1`; every coefficient that would touch it is zero.
//!
//! All `m` slopes come from one adjoint solve: `rho'_k = c · Psi^(k) = y · b_k` with
//! `A^T y = c`. As a matrix equation (symmetric `Psi`, see [`operator`]'s docs) the pair
//! system is a Stein equation (Wright-Fisher) or a Lyapunov/Sylvester-type equation
//! (death-birth, birth-death) with a diagonal correction. Two solvers ([`PairSolver`]):
//!
//! * dense: the `m (m + 1) / 2` pair unknowns assembled and factorised (the reference, used
//!   automatically up to [`DENSE_UNKNOWNS`]);
//! * iterative: the operator applied matrix-free with the kernel's sparse rows and columns
//!   (`O(m nnz)` per product), the slow coalescence direction removed by deflation, and
//!   Jacobi-preconditioned BiCGSTAB on the rest; the residual is recomputed explicitly.
//!
//! Reproductive values come from a dense solve on the dense path and from a sparse LU of the
//! bordered system (below) on the iterative one.
//!
//! # Gradient
//! For `f = sum_k u_k (rho_k(1) + s rho'_k)` ([`gradient`]): with `L Psi = R` (`R` the
//! `u`-weighted right-hand side) and `L* Y = C`, `sum_k u_k rho'_k = <Y, R>` and
//! `∂ = <∂C, Psi> - <Y, (∂L) Psi>` (the right-hand side does not depend on the kernel). The
//! reproductive values enter through `C` and the neutral term; they solve a bordered system
//! `M [v; λ] = e` (`M = [[I - B, 1], [1^T, 0]]` transposed for `nu`, `[[T - F, n], [n^T, 0]]`
//! for `w`), so `h · ∂v = -[g; μ]^T (∂M) [v; λ]` with one more solve with the same factors.
//! The kernel is treated as free entries (the formulas extend smoothly off stochastic
//! matrices); only differences along a row, such as `∂_ij - ∂_ii`, are meaningful.

mod gradient;
mod operator;
mod regime;
mod values;

pub use gradient::{gradient, WeakGradient};
pub use regime::{regime, MAX_RELATIVE_FIRST_ORDER};

use crate::model::{Model, Rule, Scope};
use faer::prelude::*;
use faer::Mat;
use operator::{packed_index, packed_len, Direction, PairOperator};

/// Default largest number of pair unknowns `m (m + 1) / 2` (2,000 demes) accepted by
/// [`first_order`]. The dense solver is used only up to [`DENSE_UNKNOWNS`]; above it the
/// iterative solver needs about nine packed vectors plus one full `m x m` matrix (about
/// 190 MB at the limit). (The limit was 3,000 unknowns while only the dense solver existed.)
pub const MAX_UNKNOWNS: usize = 2_001_000;

/// Largest number of pair unknowns (50 demes) that [`PairSolver::Auto`] solves densely.
pub const DENSE_UNKNOWNS: usize = 1275;

/// Relative residual above which a solve is reported as [`WeakError::Singular`].
const RESIDUAL_LIMIT: f64 = 1e-8;

/// Iteration budget of the iterative pair solver.
const MAX_ITERATIONS: usize = 5000;

/// Zeroth- and first-order coefficients of the fixation probability of one variant starting
/// in each deme, as a function of `s` at `s = 0` (`r = 1 + s`).
#[derive(Debug, Clone, PartialEq)]
pub struct WeakSelection {
    /// Neutral fixation probability `rho_k(1)`, in deme order.
    pub neutral: Vec<f64>,
    /// Derivative `d rho_k / d s` at `s = 0`, in deme order.
    pub slope: Vec<f64>,
}

impl WeakSelection {
    /// The first-order approximation `rho_k(1) + s rho'_k` for every deme (not clamped).
    pub fn approximate(&self, s: f64) -> Vec<f64> {
        self.neutral
            .iter()
            .zip(&self.slope)
            .map(|(a, b)| a + s * b)
            .collect()
    }

    /// `(neutral, slope)` of a start that places the variant in deme `k` with probability
    /// `weights[k]` (see [`crate::Start::deme_weights`]).
    pub fn combine(&self, weights: &[f64]) -> (f64, f64) {
        let dot = |v: &[f64]| v.iter().zip(weights).map(|(a, w)| a * w).sum::<f64>();
        (dot(&self.neutral), dot(&self.slope))
    }
}

/// Why the weak-selection coefficients cannot be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum WeakError {
    /// The pair system is larger than the limit.
    #[error("the weak-selection pair system has {unknowns} unknowns, above the limit of {limit}")]
    TooLarge {
        /// `m (m + 1) / 2`.
        unknowns: usize,
        /// The limit that applied.
        limit: usize,
    },
    /// The neutral chain has no unique reproductive value or two lineages need not ever meet
    /// (for example a migration graph with two closed groups of demes, or a periodic
    /// Wright-Fisher pattern between single-individual demes).
    #[error("the neutral chain does not coalesce: weak-selection coefficients are undefined")]
    Singular,
}

/// How the pair system is solved.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum PairSolver {
    /// Dense up to [`DENSE_UNKNOWNS`] unknowns, iterative above.
    #[default]
    Auto,
    /// Dense LU of the assembled pair system.
    Dense,
    /// Matrix-free deflated BiCGSTAB.
    Iterative,
}

/// Options of [`first_order_with`] and [`gradient`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WeakConfig {
    /// Solver choice.
    pub solver: PairSolver,
    /// Largest accepted number of pair unknowns `m (m + 1) / 2`.
    pub max_unknowns: usize,
    /// Relative residual `||rhs - A x||_inf / ||rhs||_inf` the iterative solver aims at (it
    /// accepts up to `1e-8`).
    pub tolerance: f64,
}

impl Default for WeakConfig {
    fn default() -> Self {
        Self {
            solver: PairSolver::Auto,
            max_unknowns: MAX_UNKNOWNS,
            tolerance: 1e-11,
        }
    }
}

/// How a pair solve went.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SolveInfo {
    /// The solver used ([`PairSolver::Dense`] or [`PairSolver::Iterative`]).
    pub solver: PairSolver,
    /// Largest achieved relative residual `||rhs - A x||_inf / ||rhs||_inf` of the pair
    /// solves, from an explicit product.
    pub residual: f64,
    /// Krylov iterations summed over the pair solves (0 for the dense solver).
    pub iterations: usize,
}

/// Coefficients with the solver's report.
#[derive(Debug, Clone, PartialEq)]
pub struct WeakSolution {
    /// The coefficients.
    pub coefficients: WeakSelection,
    /// How the pair system was solved.
    pub info: SolveInfo,
}

/// First-order weak-selection coefficients for `model`, with the default size limit
/// [`MAX_UNKNOWNS`]. The model's own selection coefficient is ignored: the expansion is always
/// about `s = 0`, so a model built with any `s` gives the same answer.
pub fn first_order(model: &Model) -> Result<WeakSelection, WeakError> {
    first_order_with_limit(model, MAX_UNKNOWNS)
}

/// As [`first_order`], refusing systems with more than `max_unknowns` pair unknowns.
pub fn first_order_with_limit(
    model: &Model,
    max_unknowns: usize,
) -> Result<WeakSelection, WeakError> {
    let config = WeakConfig {
        max_unknowns,
        ..WeakConfig::default()
    };
    first_order_with(model, &config).map(|s| s.coefficients)
}

/// As [`first_order`], with explicit options and the solver's report.
pub fn first_order_with(model: &Model, config: &WeakConfig) -> Result<WeakSolution, WeakError> {
    let setup = Setup::new(model, config)?;
    let solved = solve_pairs(model, &setup, config, None)?;
    let m = model.demes();
    let slope = (0..m)
        .map(|k| {
            let row: f64 = (0..m).map(|j| solved.adjoint[packed_index(m, k, j)]).sum();
            2.0 * setup.scale * row / setup.n[k]
        })
        .collect();
    Ok(WeakSolution {
        coefficients: WeakSelection {
            neutral: setup.neutral(),
            slope,
        },
        info: solved.info,
    })
}

/// What both solvers and the gradient share: sizes, reproductive values, temperatures.
#[derive(Debug, Clone)]
struct Setup {
    n: Vec<f64>,
    /// `N` for death-birth and birth-death, 1 for Wright-Fisher.
    scale: f64,
    /// Demes of one individual (no within-deme pair).
    masked: Vec<bool>,
    /// `nu` (death-birth, Wright-Fisher) or `w` (birth-death).
    rv: Vec<f64>,
    /// Birth-death temperatures (empty otherwise).
    temperature: Vec<f64>,
    /// Dense or iterative.
    solver: PairSolver,
}

impl Setup {
    fn new(model: &Model, config: &WeakConfig) -> Result<Self, WeakError> {
        let m = model.demes();
        let unknowns = packed_len(m);
        if unknowns > config.max_unknowns {
            return Err(WeakError::TooLarge {
                unknowns,
                limit: config.max_unknowns,
            });
        }
        let solver = match config.solver {
            PairSolver::Auto if unknowns <= DENSE_UNKNOWNS => PairSolver::Dense,
            PairSolver::Auto => PairSolver::Iterative,
            other => other,
        };
        let n: Vec<f64> = model.sizes().iter().map(|&v| v as f64).collect();
        let total = model.total() as f64;
        let masked = n.iter().map(|&v| v < 2.0).collect();
        let kernel = model.kernel();
        let (scale, temperature) = match model.rule() {
            Rule::DeathBirth => (total, Vec::new()),
            Rule::WrightFisher => (1.0, Vec::new()),
            Rule::BirthDeath => {
                let mut t = vec![0.0; m];
                for (l, &nl) in n.iter().enumerate() {
                    for (i, f) in kernel.row(l) {
                        t[i] += nl * f;
                    }
                }
                t.iter_mut().zip(&n).for_each(|(t, n)| *t /= n);
                (total, t)
            }
        };
        let rv = match (solver, model.rule()) {
            (PairSolver::Dense, Rule::BirthDeath) => {
                dispersal_reproductive_values(model, &temperature)?
            }
            (PairSolver::Dense, _) => recruitment_reproductive_values(model)?,
            _ => values::Bordered::new(model, &temperature)?.values()?,
        };
        Ok(Self {
            n,
            scale,
            masked,
            rv,
            temperature,
            solver,
        })
    }

    fn neutral(&self) -> Vec<f64> {
        if self.temperature.is_empty() {
            self.rv.iter().zip(&self.n).map(|(v, s)| v / s).collect()
        } else {
            self.rv.clone()
        }
    }

    fn m(&self) -> usize {
        self.n.len()
    }

    /// Reproductive values per deme, `v v^T` spanning the slow direction of `L*`: `nu`, or
    /// `n ∘ w` for birth-death.
    fn deme_values(&self) -> Vec<f64> {
        if self.temperature.is_empty() {
            self.rv.clone()
        } else {
            self.rv.iter().zip(&self.n).map(|(w, n)| w * n).collect()
        }
    }

    /// Packed right-hand side `R = sum_k u_k scale (δ_ik + δ_jk) / n_k` (zero on absent pairs).
    fn forward_rhs(&self, weights: &[f64]) -> Vec<f64> {
        let m = self.m();
        let q: Vec<f64> = (0..m).map(|k| weights[k] / self.n[k]).collect();
        let mut r = vec![0.0; packed_len(m)];
        for j in 0..m {
            for i in j..m {
                if i == j && self.masked[j] {
                    continue;
                }
                r[packed_index(m, i, j)] = self.scale * (q[i] + q[j]);
            }
        }
        r
    }
}

/// Solutions of the pair system: the adjoint `Y` (packed, `L* Y = C`) and, when asked, the
/// forward `Psi` for one right-hand side (packed, `L Psi = R`).
#[derive(Debug, Clone)]
struct PairSolution {
    adjoint: Vec<f64>,
    forward: Option<Vec<f64>>,
    info: SolveInfo,
}

fn solve_pairs(
    model: &Model,
    setup: &Setup,
    config: &WeakConfig,
    forward_rhs: Option<&[f64]>,
) -> Result<PairSolution, WeakError> {
    match setup.solver {
        PairSolver::Iterative => solve_iterative(model, setup, config, forward_rhs),
        _ => solve_dense(model, setup, forward_rhs),
    }
}

/// `Ω^-1` on a packed vector: halves off-diagonal entries.
fn halve_off_diagonal(m: usize, v: &mut [f64]) {
    for j in 0..m {
        for i in j + 1..m {
            v[packed_index(m, i, j)] *= 0.5;
        }
    }
}

fn solve_dense(
    model: &Model,
    setup: &Setup,
    forward_rhs: Option<&[f64]>,
) -> Result<PairSolution, WeakError> {
    let m = model.demes();
    let pairs = Pairs { m };
    let n = &setup.n;
    let kernel = |i: usize, j: usize| model.kernel().get(i, j);
    let (system, weights) = match model.rule() {
        Rule::DeathBirth | Rule::WrightFisher => {
            let system = if model.rule() == Rule::DeathBirth {
                death_birth_system(&pairs, n, &kernel)
            } else {
                wright_fisher_system(&pairs, n, &kernel)
            };
            let weights = match model.scope() {
                Scope::Deme => deme_scope_weights(&pairs, n, &setup.rv, setup.scale),
                Scope::Neighbourhood => {
                    neighbourhood_weights(&pairs, n, &setup.rv, &kernel, setup.scale)
                }
            };
            (system, weights)
        }
        Rule::BirthDeath => {
            let system = birth_death_system(&pairs, n, &kernel, &setup.temperature);
            let weights = birth_death_weights(&pairs, n, &setup.rv, &kernel, setup.scale);
            (system, weights)
        }
    };
    let lu = system.partial_piv_lu();
    let u = pairs.count();
    let column = |v: &[f64]| Mat::<f64>::from_fn(u, 1, |i, _| v[i]);
    let y = lu.solve_transpose(column(&weights));
    let mut y: Vec<f64> = (0..u).map(|i| y[(i, 0)]).collect();
    let mut residual = check_residual(&system, &y, &weights, true)?;
    halve_off_diagonal(m, &mut y);
    let forward = match forward_rhs {
        Some(b) => {
            let x = lu.solve(column(b));
            let x: Vec<f64> = (0..u).map(|i| x[(i, 0)]).collect();
            residual = residual.max(check_residual(&system, &x, b, false)?);
            Some(x)
        }
        None => None,
    };
    Ok(PairSolution {
        adjoint: y,
        forward,
        info: SolveInfo {
            solver: PairSolver::Dense,
            residual,
            iterations: 0,
        },
    })
}

/// Packed `C` of `<C, Psi> = sum_k`-free slope functional (`L* Y = C`), built from the
/// kernel's sparse rows: `C_jl` is the coefficient of the ordered pair `(j, l)`.
fn packed_weights(model: &Model, setup: &Setup) -> Vec<f64> {
    let m = model.demes();
    let n = &setup.n;
    let kernel = model.kernel();
    let mut c = vec![0.0; packed_len(m)];
    match (model.rule(), model.scope()) {
        (Rule::BirthDeath, _) => {
            for l in 0..m {
                for (i, f) in kernel.row(l) {
                    let parents = if l == i { n[l] - 1.0 } else { n[l] };
                    let coef = f * setup.rv[i] * parents / (2.0 * setup.scale);
                    // Symmetrised: half to each ordered pair of an off-diagonal position.
                    c[packed_index(m, l, i)] += if l == i { coef } else { 0.5 * coef };
                }
            }
        }
        (_, Scope::Deme) => {
            for j in 0..m {
                c[packed_index(m, j, j)] = setup.rv[j] * (n[j] - 1.0) / (2.0 * n[j]) / setup.scale;
            }
        }
        (_, Scope::Neighbourhood) => {
            for i in 0..m {
                let nu = setup.rv[i];
                for (j, bj) in kernel.row(i) {
                    for (l, bl) in kernel.row(i) {
                        if l > j {
                            break;
                        }
                        let other = if j == l { 1.0 - 1.0 / n[j] } else { 1.0 };
                        c[packed_index(m, j, l)] += nu * bj * bl * other / (2.0 * setup.scale);
                    }
                }
            }
        }
    }
    c
}

/// Packed `v v^T` (zero on absent pairs), scaled by `Ω` (off-diagonal doubled) if asked.
fn packed_outer(setup: &Setup, v: &[f64], doubled: bool) -> Vec<f64> {
    let m = setup.m();
    let mut out = vec![0.0; packed_len(m)];
    for j in 0..m {
        for i in j..m {
            let p = packed_index(m, i, j);
            out[p] = if i == j {
                if setup.masked[j] {
                    0.0
                } else {
                    v[i] * v[j]
                }
            } else if doubled {
                2.0 * v[i] * v[j]
            } else {
                v[i] * v[j]
            };
        }
    }
    out
}

fn solve_iterative(
    model: &Model,
    setup: &Setup,
    config: &WeakConfig,
    forward_rhs: Option<&[f64]>,
) -> Result<PairSolution, WeakError> {
    let op = PairOperator::new(
        model.rule(),
        model.kernel(),
        &setup.n,
        &setup.temperature,
        &setup.masked,
    );
    let c = packed_weights(model, setup);
    let v = setup.deme_values();
    let ones = vec![1.0; setup.m()];
    let target = config.tolerance;
    let adjoint = operator::solve_deflated(
        &op,
        Direction::Adjoint,
        &c,
        &packed_outer(setup, &v, false),
        &packed_outer(setup, &ones, true),
        target,
        MAX_ITERATIONS,
    )
    .ok_or(WeakError::Singular)?;
    let mut residual = adjoint.residual;
    let mut iterations = adjoint.iterations;
    let forward = match forward_rhs {
        Some(b) => {
            let solved = operator::solve_deflated(
                &op,
                Direction::Forward,
                b,
                &packed_outer(setup, &ones, false),
                &packed_outer(setup, &v, true),
                target,
                MAX_ITERATIONS,
            )
            .ok_or(WeakError::Singular)?;
            residual = residual.max(solved.residual);
            iterations += solved.iterations;
            Some(solved.x)
        }
        None => None,
    };
    if residual.is_nan() || residual > RESIDUAL_LIMIT {
        return Err(WeakError::Singular);
    }
    Ok(PairSolution {
        adjoint: adjoint.x,
        forward,
        info: SolveInfo {
            solver: PairSolver::Iterative,
            residual,
            iterations,
        },
    })
}

/// Indexing of unordered deme pairs `(i, j)`, `i <= j`, row by row.
struct Pairs {
    m: usize,
}

impl Pairs {
    fn count(&self) -> usize {
        self.m * (self.m + 1) / 2
    }

    fn index(&self, i: usize, j: usize) -> usize {
        let (a, b) = if i <= j { (i, j) } else { (j, i) };
        // Rows 0..a hold m + (m - 1) + ... + (m - a + 1) pairs.
        a * self.m - a * (a.saturating_sub(1)) / 2 + (b - a)
    }

    fn iter(&self) -> impl Iterator<Item = (usize, usize)> + '_ {
        (0..self.m).flat_map(move |i| (i..self.m).map(move |j| (i, j)))
    }
}

/// `1 - δ_ij / n_j`: probability that a uniformly chosen individual of deme `j` differs from a
/// given individual of deme `i`.
fn other(i: usize, j: usize, n: &[f64]) -> f64 {
    if i == j {
        1.0 - 1.0 / n[j]
    } else {
        1.0
    }
}

/// Whether two distinct individuals can sit in demes `i` and `j` (not when `i = j` and
/// `n_i = 1`; such a pair's row is set to `Psi_ii = 0`).
fn pair_exists(i: usize, j: usize, n: &[f64]) -> bool {
    i != j || n[i] >= 2.0
}

fn death_birth_system(pairs: &Pairs, n: &[f64], b: &impl Fn(usize, usize) -> f64) -> Mat<f64> {
    let u = pairs.count();
    let m = pairs.m;
    let mut a = Mat::<f64>::zeros(u, u);
    for (i, j) in pairs.iter() {
        let row = pairs.index(i, j);
        if !pair_exists(i, j, n) {
            a[(row, row)] = 1.0;
            continue;
        }
        a[(row, row)] += 2.0;
        for l in 0..m {
            a[(row, pairs.index(l, j))] -= b(i, l) * other(l, j, n);
            a[(row, pairs.index(i, l))] -= b(j, l) * other(l, i, n);
        }
    }
    a
}

fn wright_fisher_system(pairs: &Pairs, n: &[f64], b: &impl Fn(usize, usize) -> f64) -> Mat<f64> {
    let u = pairs.count();
    let m = pairs.m;
    let mut a = Mat::<f64>::zeros(u, u);
    for (i, j) in pairs.iter() {
        let row = pairs.index(i, j);
        if !pair_exists(i, j, n) {
            a[(row, row)] = 1.0;
            continue;
        }
        a[(row, row)] += 1.0;
        for l in 0..m {
            let bil = b(i, l);
            if bil == 0.0 {
                continue;
            }
            for mm in 0..m {
                a[(row, pairs.index(l, mm))] -= bil * b(j, mm) * other(l, mm, n);
            }
        }
    }
    a
}

fn birth_death_system(
    pairs: &Pairs,
    n: &[f64],
    f: &impl Fn(usize, usize) -> f64,
    temperature: &[f64],
) -> Mat<f64> {
    let u = pairs.count();
    let m = pairs.m;
    let mut a = Mat::<f64>::zeros(u, u);
    // Parents in deme l other than the partner: n_l - δ_lj.
    let others = |l: usize, j: usize| if l == j { n[l] - 1.0 } else { n[l] };
    for (i, j) in pairs.iter() {
        let row = pairs.index(i, j);
        if !pair_exists(i, j, n) {
            a[(row, row)] = 1.0;
            continue;
        }
        a[(row, row)] += temperature[i] + temperature[j];
        for l in 0..m {
            a[(row, pairs.index(l, j))] -= f(l, i) * others(l, j) / n[i];
            a[(row, pairs.index(i, l))] -= f(l, j) * others(l, i) / n[j];
        }
    }
    a
}

/// Coefficients of `Psi` in `rho'` under `deme` scope: `nu_j (n_j - 1) / (2 n_j)` on `(j, j)`,
/// divided by `N` for death-birth (`scale = N`) and not for Wright-Fisher (`scale = 1`).
fn deme_scope_weights(pairs: &Pairs, n: &[f64], nu: &[f64], scale: f64) -> Vec<f64> {
    let mut c = vec![0.0; pairs.count()];
    for j in 0..pairs.m {
        c[pairs.index(j, j)] = nu[j] * (n[j] - 1.0) / (2.0 * n[j]) / scale;
    }
    c
}

/// Coefficients under `neighbourhood` scope:
/// `(1/(2 scale)) sum_i nu_i B_ij B_il (1 - δ_jl/n_j)` on the ordered pair `(j, l)`.
fn neighbourhood_weights(
    pairs: &Pairs,
    n: &[f64],
    nu: &[f64],
    b: &impl Fn(usize, usize) -> f64,
    scale: f64,
) -> Vec<f64> {
    let m = pairs.m;
    let mut c = vec![0.0; pairs.count()];
    for (i, &nu_i) in nu.iter().enumerate() {
        for j in 0..m {
            let bij = b(i, j);
            if bij == 0.0 {
                continue;
            }
            for l in 0..m {
                c[pairs.index(j, l)] += nu_i * bij * b(i, l) * other(j, l, n) / (2.0 * scale);
            }
        }
    }
    c
}

/// Coefficients for birth-death: `(1/2N) F_li w_i (n_l - δ_il)` on the ordered pair `(l, i)`.
fn birth_death_weights(
    pairs: &Pairs,
    n: &[f64],
    w: &[f64],
    f: &impl Fn(usize, usize) -> f64,
    total: f64,
) -> Vec<f64> {
    let m = pairs.m;
    let mut c = vec![0.0; pairs.count()];
    for l in 0..m {
        for i in 0..m {
            let parents = if l == i { n[l] - 1.0 } else { n[l] };
            c[pairs.index(l, i)] += f(l, i) * w[i] * parents / (2.0 * total);
        }
    }
    c
}

/// Left Perron vector `nu` of the recruitment matrix (`nu B = nu`, `sum nu = 1`), by a dense
/// solve of `(I - B)^T nu = 0` with one equation replaced by the normalisation.
fn recruitment_reproductive_values(model: &Model) -> Result<Vec<f64>, WeakError> {
    let m = model.demes();
    let b = model.kernel();
    let a = Mat::<f64>::from_fn(m, m, |i, j| {
        if i == m - 1 {
            1.0
        } else {
            identity(i, j) - b.get(j, i)
        }
    });
    let mut rhs = Mat::<f64>::zeros(m, 1);
    rhs[(m - 1, 0)] = 1.0;
    let nu = solve_checked(&a, &rhs)?;
    Ok(nu)
}

/// Per-individual birth-death reproductive values `w` (`w_i T_i = sum_l F_il w_l`,
/// `sum_i n_i w_i = 1`): the neutral fixation probability from one variant in deme `i`.
fn dispersal_reproductive_values(
    model: &Model,
    temperature: &[f64],
) -> Result<Vec<f64>, WeakError> {
    let m = model.demes();
    let f = model.kernel();
    let sizes = model.sizes();
    let a = Mat::<f64>::from_fn(m, m, |i, l| {
        if i == m - 1 {
            sizes[l] as f64
        } else {
            identity(i, l) * temperature[i] - f.get(i, l)
        }
    });
    let mut rhs = Mat::<f64>::zeros(m, 1);
    rhs[(m - 1, 0)] = 1.0;
    solve_checked(&a, &rhs)
}

fn identity(i: usize, j: usize) -> f64 {
    if i == j {
        1.0
    } else {
        0.0
    }
}

/// Solves `a x = rhs` (one column) and checks finiteness and the relative residual.
fn solve_checked(a: &Mat<f64>, rhs: &Mat<f64>) -> Result<Vec<f64>, WeakError> {
    let x = a.partial_piv_lu().solve(rhs);
    let x: Vec<f64> = (0..a.ncols()).map(|i| x[(i, 0)]).collect();
    let rhs: Vec<f64> = (0..a.nrows()).map(|i| rhs[(i, 0)]).collect();
    check_residual(a, &x, &rhs, false)?;
    Ok(x)
}

/// The solution must be finite and `||rhs - a x||_inf / ||rhs||_inf` (or with `a^T`) small:
/// an LU factorisation is backward stable even for a (nearly) singular matrix, so the residual
/// is measured against the right-hand side, which exposes the huge solutions of a matrix that
/// is singular up to rounding.
fn check_residual(a: &Mat<f64>, x: &[f64], rhs: &[f64], transpose: bool) -> Result<f64, WeakError> {
    if x.iter().any(|v| !v.is_finite()) {
        return Err(WeakError::Singular);
    }
    let scale = rhs.iter().fold(0.0f64, |acc, v| acc.max(v.abs()));
    let mut worst = 0.0f64;
    for (i, &target) in rhs.iter().enumerate() {
        let mut acc = target;
        for (j, xj) in x.iter().enumerate() {
            let aij = if transpose { a[(j, i)] } else { a[(i, j)] };
            acc -= aij * xj;
        }
        worst = worst.max(acc.abs());
    }
    let relative = if scale > 0.0 { worst / scale } else { 0.0 };
    if relative > RESIDUAL_LIMIT {
        return Err(WeakError::Singular);
    }
    Ok(relative)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::migration::StochasticMatrix;
    use crate::population::Population;
    use crate::start::Start;

    fn model(sizes: &[u64], rows: &[Vec<f64>], rule: Rule, scope: Scope) -> Model {
        let pop = Population::new(sizes.to_vec()).unwrap();
        let kernel = StochasticMatrix::from_weights(rows).unwrap();
        Model::new(&pop, kernel, rule, scope, 0.0).unwrap()
    }

    fn graph(weights: &[Vec<f64>], rule: Rule) -> Model {
        model(&vec![1; weights.len()], weights, rule, Scope::Neighbourhood)
    }

    fn complete(n: usize) -> Vec<Vec<f64>> {
        (0..n)
            .map(|i| (0..n).map(|j| if i == j { 0.0 } else { 1.0 }).collect())
            .collect()
    }

    fn star(leaves: usize) -> Vec<Vec<f64>> {
        let n = leaves + 1;
        (0..n)
            .map(|i| {
                (0..n)
                    .map(|j| if (i == 0) != (j == 0) { 1.0 } else { 0.0 })
                    .collect()
            })
            .collect()
    }

    fn cycle(n: usize) -> Vec<Vec<f64>> {
        (0..n)
            .map(|i| {
                (0..n)
                    .map(|j| {
                        if (i + 1) % n == j || (j + 1) % n == i {
                            1.0
                        } else {
                            0.0
                        }
                    })
                    .collect()
            })
            .collect()
    }

    fn path(n: usize) -> Vec<Vec<f64>> {
        (0..n)
            .map(|i| {
                (0..n)
                    .map(|j| if i.abs_diff(j) == 1 { 1.0 } else { 0.0 })
                    .collect()
            })
            .collect()
    }

    fn w5() -> Vec<Vec<f64>> {
        vec![
            vec![0.0, 2.0, 1.0, 0.0, 0.0],
            vec![2.0, 0.0, 1.0, 1.0, 0.0],
            vec![1.0, 1.0, 0.0, 3.0, 1.0],
            vec![0.0, 1.0, 3.0, 0.0, 1.0],
            vec![0.0, 0.0, 1.0, 1.0, 0.0],
        ]
    }

    fn close(got: f64, want: f64, tol: f64) -> bool {
        (got - want).abs() <= tol * want.abs().max(1e-300)
    }

    #[test]
    fn pair_indices_are_a_bijection() {
        for m in 1..7 {
            let pairs = Pairs { m };
            let idx: Vec<usize> = pairs.iter().map(|(i, j)| pairs.index(i, j)).collect();
            assert_eq!(idx, (0..pairs.count()).collect::<Vec<_>>());
            assert_eq!(pairs.index(m - 1, 0), pairs.index(0, m - 1));
        }
    }

    #[test]
    fn one_deme_slopes_are_the_well_mixed_ones() {
        // Moran (1958) / Nowak (2006), from memory: d rho / d r at r = 1 is (N - 1)/(2N)
        // (references.md §1.1 identity); haploid Wright-Fisher (N - 1)/N (references.md §5.4,
        // consistent with Kimura 1962).
        for n in [1u64, 2, 5, 10, 37] {
            let nf = n as f64;
            for (rule, scope, want) in [
                (Rule::DeathBirth, Scope::Deme, (nf - 1.0) / (2.0 * nf)),
                (
                    Rule::DeathBirth,
                    Scope::Neighbourhood,
                    (nf - 1.0) / (2.0 * nf),
                ),
                (Rule::BirthDeath, Scope::Deme, (nf - 1.0) / (2.0 * nf)),
                (Rule::WrightFisher, Scope::Deme, (nf - 1.0) / nf),
                (Rule::WrightFisher, Scope::Neighbourhood, (nf - 1.0) / nf),
            ] {
                let got = first_order(&model(&[n], &[vec![1.0]], rule, scope)).unwrap();
                assert!(close(got.neutral[0], 1.0 / nf, 1e-14), "{rule:?} {n}");
                assert!(
                    (got.slope[0] - want).abs() < 1e-13,
                    "{rule:?} {scope:?} {n}: {got:?}"
                );
            }
        }
    }

    /// (rule, start) -> value columns of references.md §5.3 (computed by the maintainers and
    /// checked there against finite differences of an exact chain; the approach is Allen et al.
    /// 2017 Nature 544:227-230 and Allen et al. 2021 PLoS Comput. Biol. 17:e1008695).
    #[test]
    fn graph_slopes_match_the_reference_table() {
        let cases = [
            ("K5", complete(5), [0.3, 0.4, 0.2, 0.4]),
            (
                "star5",
                star(5),
                [1.0 / 9.0, 0.5876068376, 0.0641025641, 0.2457264957],
            ),
            (
                "star9",
                star(9),
                [0.08, 0.7309756098, 0.0219512195, 0.1690243902],
            ),
            (
                "C6",
                cycle(6),
                [1.0 / 3.0, 0.416666667, 1.0 / 6.0, 0.416666667],
            ),
            (
                "P5",
                path(5),
                [0.2436974790, 0.4376899696, 0.1714285714, 0.3920972644],
            ),
            (
                "W5",
                w5(),
                [0.2448154222, 0.4105457474, 0.1647509579, 0.3613999945],
            ),
        ];
        for (name, w, [db, bd, bd_temp_rho, bd_temp]) in cases {
            let db_model = graph(&w, Rule::DeathBirth);
            let db_weak = first_order(&db_model).unwrap();
            let uniform = Start::Uniform.deme_weights(&db_model);
            let (rho, slope) = db_weak.combine(&uniform);
            assert!(
                close(rho, 1.0 / w.len() as f64, 1e-12),
                "{name} DB rho {rho}"
            );
            assert!(close(slope, db, 1e-8), "{name} DB {slope} vs {db}");

            let bd_model = graph(&w, Rule::BirthDeath);
            let bd_weak = first_order(&bd_model).unwrap();
            let (rho, slope) = bd_weak.combine(&Start::Uniform.deme_weights(&bd_model));
            assert!(
                close(rho, 1.0 / w.len() as f64, 1e-12),
                "{name} BD rho {rho}"
            );
            assert!(close(slope, bd, 1e-8), "{name} BD {slope} vs {bd}");
            let (rho, slope) = bd_weak.combine(&Start::AtBirth.deme_weights(&bd_model));
            assert!(close(rho, bd_temp_rho, 1e-8), "{name} BD temp rho {rho}");
            assert!(
                close(slope, bd_temp, 1e-8),
                "{name} BD temp {slope} vs {bd_temp}"
            );
        }
    }

    #[test]
    fn isothermal_graphs_have_the_moran_slope() {
        // Allen et al. (2021) PLoS Comput. Biol. 17:e1008695, Fig. 1 caption (references.md
        // §8 item 1): isothermal graphs have rho = 1/N and rho' = (N - 1)/(2N) under
        // birth-death, from every start.
        for w in [complete(7), cycle(7)] {
            let weak = first_order(&graph(&w, Rule::BirthDeath)).unwrap();
            for (rho, slope) in weak.neutral.iter().zip(&weak.slope) {
                assert!(close(*rho, 1.0 / 7.0, 1e-12));
                assert!(close(*slope, 6.0 / 14.0, 1e-10), "{slope}");
            }
        }
    }

    /// Individual-level pair recursion of references.md §5.3 on an explicit graph, for
    /// birth-death (`p` = dispersal weights `p_ab`) or death-birth (`p` = parent-of weights
    /// `e_ab`), mutant starting at individual `k`. Independent of the deme lumping above.
    fn individual_slope(p: &[Vec<f64>], birth_death: bool, k: usize) -> f64 {
        let n = p.len();
        let idx = |a: usize, b: usize| a * n + b;
        let mut a = Mat::<f64>::zeros(n * n, n * n);
        let mut rhs = Mat::<f64>::zeros(n * n, 1);
        let temp: Vec<f64> = (0..n).map(|b| (0..n).map(|a| p[a][b]).sum()).collect();
        for x in 0..n {
            for y in 0..n {
                let row = idx(x, y);
                if x == y {
                    a[(row, row)] = 1.0;
                    continue;
                }
                rhs[(row, 0)] =
                    n as f64 * (f64::from(u8::from(x == k)) + f64::from(u8::from(y == k)));
                if birth_death {
                    a[(row, row)] += temp[x] + temp[y];
                    for b in 0..n {
                        a[(row, idx(b, y))] -= p[b][x];
                        a[(row, idx(x, b))] -= p[b][y];
                    }
                } else {
                    a[(row, row)] += 2.0;
                    for b in 0..n {
                        a[(row, idx(b, y))] -= p[x][b];
                        a[(row, idx(x, b))] -= p[y][b];
                    }
                }
            }
        }
        let psi = a.partial_piv_lu().solve(&rhs);
        // Reproductive values: BD pi_b T_b = sum_a p_ba pi_a; DB pi e = pi.
        let rv = Mat::<f64>::from_fn(n, n, |i, j| {
            if i == n - 1 {
                1.0
            } else if birth_death {
                identity(i, j) * temp[i] - p[i][j]
            } else {
                identity(i, j) - p[j][i]
            }
        });
        let mut e = Mat::<f64>::zeros(n, 1);
        e[(n - 1, 0)] = 1.0;
        let pi = rv.partial_piv_lu().solve(&e);
        let mut slope = 0.0;
        for x in 0..n {
            for y in 0..n {
                for z in 0..n {
                    if birth_death {
                        if z == 0 {
                            // sum_{a,b} p_ba pi_a Psi_ab, counted once per (x = a, y = b).
                            slope += p[y][x] * pi[(x, 0)] * psi[(idx(x, y), 0)];
                        }
                    } else {
                        slope += pi[(x, 0)] * p[x][y] * p[x][z] * psi[(idx(y, z), 0)];
                    }
                }
            }
        }
        slope / (2.0 * n as f64)
    }

    #[test]
    fn deme_lumping_agrees_with_the_individual_graph() {
        let sizes = [2u64, 3, 1];
        let rows = vec![
            vec![0.5, 0.3, 0.2],
            vec![0.1, 0.6, 0.3],
            vec![0.25, 0.25, 0.5],
        ];
        let deme_of: Vec<usize> = sizes
            .iter()
            .enumerate()
            .flat_map(|(d, &s)| std::iter::repeat_n(d, s as usize))
            .collect();
        let kernel = StochasticMatrix::from_weights(&rows).unwrap();
        // p_ab = F[d(a)][d(b)] / n_{d(b)}, e_ab = B[d(a)][d(b)] / n_{d(b)}, self included.
        let p: Vec<Vec<f64>> = deme_of
            .iter()
            .map(|&da| {
                deme_of
                    .iter()
                    .map(|&db| kernel.get(da, db) / sizes[db] as f64)
                    .collect()
            })
            .collect();
        for (rule, scope, bd) in [
            (Rule::BirthDeath, Scope::Deme, true),
            (Rule::DeathBirth, Scope::Neighbourhood, false),
        ] {
            let weak = first_order(&model(&sizes, &rows, rule, scope)).unwrap();
            let mut first = 0;
            for (d, &size) in sizes.iter().enumerate() {
                for member in first..first + size as usize {
                    let want = individual_slope(&p, bd, member);
                    assert!(
                        close(weak.slope[d], want, 1e-10),
                        "{rule:?} deme {d}: {} vs {want}",
                        weak.slope[d]
                    );
                }
                first += size as usize;
            }
        }
    }

    #[test]
    fn a_deme_scope_model_of_single_individuals_has_no_slope() {
        // Under deme scope a deme of one individual exerts no selection (model contract).
        let weak = first_order(&model(
            &[1, 1, 1],
            &complete(3),
            Rule::DeathBirth,
            Scope::Deme,
        ))
        .unwrap();
        assert!(weak.slope.iter().all(|&v| v.abs() < 1e-15));
        assert!(weak.neutral.iter().all(|&v| close(v, 1.0 / 3.0, 1e-12)));
    }

    #[test]
    fn systems_above_the_limit_are_refused() {
        let m = model(&[2, 2, 2], &complete(3), Rule::WrightFisher, Scope::Deme);
        assert_eq!(
            first_order_with_limit(&m, 5),
            Err(WeakError::TooLarge {
                unknowns: 6,
                limit: 5
            })
        );
        assert!(first_order_with_limit(&m, 6).is_ok());
    }

    #[test]
    fn two_closed_groups_are_singular() {
        let rows = vec![vec![1.0, 0.0], vec![0.0, 1.0]];
        for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
            let m = model(&[3, 4], &rows, rule, Scope::Deme);
            assert_eq!(first_order(&m), Err(WeakError::Singular), "{rule:?}");
        }
    }

    fn solver(kind: PairSolver) -> WeakConfig {
        WeakConfig {
            solver: kind,
            ..WeakConfig::default()
        }
    }

    /// Small models of every rule and scope: islands, single-individual demes, a graph, a
    /// kernel with one closed deme feeding the others (not strongly connected).
    fn small_cases() -> Vec<Model> {
        let three = vec![
            vec![0.5, 0.3, 0.2],
            vec![0.1, 0.6, 0.3],
            vec![0.25, 0.25, 0.5],
        ];
        let one_way = vec![
            vec![1.0, 0.0, 0.0, 0.0],
            vec![0.3, 0.7, 0.0, 0.0],
            vec![0.2, 0.3, 0.5, 0.0],
            vec![0.0, 0.1, 0.4, 0.5],
        ];
        let mut out = Vec::new();
        for (rule, scope) in [
            (Rule::DeathBirth, Scope::Deme),
            (Rule::DeathBirth, Scope::Neighbourhood),
            (Rule::WrightFisher, Scope::Deme),
            (Rule::WrightFisher, Scope::Neighbourhood),
            (Rule::BirthDeath, Scope::Deme),
        ] {
            out.push(model(&[2, 3, 4], &three, rule, scope));
            out.push(model(&[1, 4, 2], &three, rule, scope));
            out.push(model(&[3, 1, 5, 2], &one_way, rule, scope));
            out.push(model(&[1, 1, 1, 1, 1], &w5(), rule, scope));
            out.push(model(&[500, 20_000, 3], &three, rule, scope));
        }
        out
    }

    #[test]
    fn matrix_free_products_equal_the_dense_pair_matrix() {
        for model in small_cases() {
            let setup = Setup::new(&model, &solver(PairSolver::Dense)).unwrap();
            let m = model.demes();
            let pairs = Pairs { m };
            let k = |i: usize, j: usize| model.kernel().get(i, j);
            let dense = match model.rule() {
                Rule::DeathBirth => death_birth_system(&pairs, &setup.n, &k),
                Rule::WrightFisher => wright_fisher_system(&pairs, &setup.n, &k),
                Rule::BirthDeath => birth_death_system(&pairs, &setup.n, &k, &setup.temperature),
            };
            let op = PairOperator::new(
                model.rule(),
                model.kernel(),
                &setup.n,
                &setup.temperature,
                &setup.masked,
            );
            let u = pairs.count();
            let x: Vec<f64> = (0..u).map(|p| ((p * 7 + 3) % 11) as f64 - 4.5).collect();
            let mut full = vec![0.0; m * m];
            let mut got = vec![0.0; u];
            op.apply(Direction::Forward, &x, &mut got, &mut full);
            for r in 0..u {
                let want: f64 = (0..u).map(|c| dense[(r, c)] * x[c]).sum();
                assert!((got[r] - want).abs() < 1e-12 * (1.0 + want.abs()), "{r}");
            }
            // L* = Ω^-1 A^T Ω.
            op.apply(Direction::Adjoint, &x, &mut got, &mut full);
            let mut omega_x = x.clone();
            for (i, j) in pairs.iter() {
                if i != j {
                    omega_x[pairs.index(i, j)] *= 2.0;
                }
            }
            let mut want: Vec<f64> = (0..u)
                .map(|r| (0..u).map(|c| dense[(c, r)] * omega_x[c]).sum())
                .collect();
            halve_off_diagonal(m, &mut want);
            for r in 0..u {
                assert!(
                    (got[r] - want[r]).abs() < 1e-12 * (1.0 + want[r].abs()),
                    "{r}"
                );
            }
            for (p, d) in op.diagonal().iter().enumerate() {
                assert!((d - dense[(p, p)]).abs() < 1e-14, "{p}");
            }
        }
    }

    #[test]
    fn iterative_and_dense_solvers_agree() {
        for model in small_cases() {
            let dense = first_order_with(&model, &solver(PairSolver::Dense)).unwrap();
            let iterative = first_order_with(&model, &solver(PairSolver::Iterative)).unwrap();
            assert_eq!(iterative.info.solver, PairSolver::Iterative);
            assert!(iterative.info.residual <= 1e-10, "{:?}", iterative.info);
            let (a, b) = (&dense.coefficients, &iterative.coefficients);
            for k in 0..model.demes() {
                let label = format!(
                    "{:?} {:?} {:?} deme {k}",
                    model.rule(),
                    model.scope(),
                    model.sizes()
                );
                assert!(
                    (a.neutral[k] - b.neutral[k]).abs() <= 1e-12 * a.neutral[k].abs() + 1e-15,
                    "{label}: {} vs {}",
                    a.neutral[k],
                    b.neutral[k]
                );
                assert!(
                    (a.slope[k] - b.slope[k]).abs() <= 1e-9 * a.slope[k].abs() + 1e-14,
                    "{label}: {} vs {}",
                    a.slope[k],
                    b.slope[k]
                );
            }
        }
    }

    #[test]
    fn the_packed_slope_weights_are_the_dense_ones_halved_off_the_diagonal() {
        for model in small_cases() {
            let setup = Setup::new(&model, &solver(PairSolver::Dense)).unwrap();
            let m = model.demes();
            let pairs = Pairs { m };
            let k = |i: usize, j: usize| model.kernel().get(i, j);
            let mut want = match (model.rule(), model.scope()) {
                (Rule::BirthDeath, _) => {
                    birth_death_weights(&pairs, &setup.n, &setup.rv, &k, setup.scale)
                }
                (_, Scope::Deme) => deme_scope_weights(&pairs, &setup.n, &setup.rv, setup.scale),
                (_, Scope::Neighbourhood) => {
                    neighbourhood_weights(&pairs, &setup.n, &setup.rv, &k, setup.scale)
                }
            };
            halve_off_diagonal(m, &mut want);
            let got = packed_weights(&model, &setup);
            for (g, w) in got.iter().zip(&want) {
                assert!((g - w).abs() <= 1e-15 * (1.0 + w.abs()));
            }
        }
    }

    #[test]
    fn the_iterative_solver_refuses_two_closed_groups() {
        let rows = vec![vec![1.0, 0.0], vec![0.0, 1.0]];
        for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
            let m = model(&[3, 4], &rows, rule, Scope::Deme);
            assert_eq!(
                first_order_with(&m, &solver(PairSolver::Iterative)),
                Err(WeakError::Singular),
                "{rule:?}"
            );
        }
    }

    /// Moves `h` of row `i` from column `from` to column `to`.
    fn shifted(model: &Model, i: usize, to: usize, from: usize, h: f64) -> Model {
        let m = model.demes();
        let mut rows: Vec<Vec<f64>> = (0..m)
            .map(|r| (0..m).map(|c| model.kernel().get(r, c)).collect())
            .collect();
        rows[i][to] += h;
        rows[i][from] -= h;
        let kernel = StochasticMatrix::from_weights(&rows).unwrap();
        let pop = Population::new(model.sizes().to_vec()).unwrap();
        Model::new(&pop, kernel, model.rule(), model.scope(), 0.0).unwrap()
    }

    #[test]
    fn kernel_partials_match_central_differences() {
        // Central differences of this module's own coefficients (the brief's check; common
        // practice): moving h from K_il to K_ij changes f by h (∂_ij - ∂_il) + O(h^3).
        let h = 1e-5;
        for model in small_cases() {
            if model.sizes().iter().sum::<u64>() > 100 {
                continue;
            }
            let m = model.demes();
            let weights: Vec<f64> = (0..m).map(|k| (k + 1) as f64).collect();
            let total: f64 = weights.iter().sum();
            let weights: Vec<f64> = weights.iter().map(|w| w / total).collect();
            for kind in [PairSolver::Dense, PairSolver::Iterative] {
                let grad = gradient(&model, &weights, &solver(kind)).unwrap();
                let plain = first_order(&model).unwrap();
                let (rho, slope) = plain.combine(&weights);
                assert!((grad.neutral - rho).abs() < 1e-12);
                assert!((grad.slope - slope).abs() < 1e-9 * slope.abs().max(1e-9));
                let lookup = |p: &crate::sensitivity::KernelPartials, i: usize, j: usize| {
                    p.entries
                        .iter()
                        .find(|&&(a, b, _)| a == i && b == j)
                        .map(|e| e.2)
                        .unwrap()
                };
                for i in 0..m {
                    let positive: Vec<usize> = model.kernel().row(i).map(|(j, _)| j).collect();
                    let from = if model.kernel().get(i, i) > 0.0 {
                        i
                    } else {
                        positive[0]
                    };
                    for &j in positive.iter().filter(|&&j| j != from) {
                        let up = first_order(&shifted(&model, i, j, from, h)).unwrap();
                        let down = first_order(&shifted(&model, i, j, from, -h)).unwrap();
                        let (n_up, s_up) = up.combine(&weights);
                        let (n_down, s_down) = down.combine(&weights);
                        let fd_neutral = (n_up - n_down) / (2.0 * h);
                        let fd_slope = (s_up - s_down) / (2.0 * h);
                        let an_neutral = lookup(&grad.neutral_partials, i, j)
                            - lookup(&grad.neutral_partials, i, from);
                        let an_slope = lookup(&grad.slope_partials, i, j)
                            - lookup(&grad.slope_partials, i, from);
                        let label = format!(
                            "{:?} {:?} {:?} {kind:?} ({i},{j})-({i},{from})",
                            model.rule(),
                            model.scope(),
                            model.sizes()
                        );
                        assert!(
                            (fd_neutral - an_neutral).abs() <= 1e-7 * (1.0 + an_neutral.abs()),
                            "{label} neutral: {an_neutral} vs {fd_neutral}"
                        );
                        assert!(
                            (fd_slope - an_slope).abs() <= 1e-6 * (1.0 + an_slope.abs()),
                            "{label} slope: {an_slope} vs {fd_slope}"
                        );
                    }
                }
            }
        }
    }
}
