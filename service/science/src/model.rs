//! The update rules: one place that says, for a count vector `k`, how likely each change is.
//!
//! Every method (exact chain, ensemble, approximations) takes its transition probabilities
//! from here, so the model is defined once. The formulas are those of the project's model
//! contract (DEVELOPERS.md, "The model"):
//!
//! * recruitment into deme `i` is a variant with probability `p_i(k)`, under `deme` scope
//!   `p_i = sum_j B[i][j] r k_j / (r k_j + n_j - k_j)`, under `neighbourhood` scope
//!   `p_i = sum_j B[i][j] r k_j / n_j / sum_j B[i][j] (r k_j + n_j - k_j) / n_j`;
//!   `q_i = 1 - p_i` is computed as its own sum so that impossible moves get exactly 0;
//! * death-birth: `P(k -> k + e_i) = (n_i - k_i)/N p_i`, `P(k -> k - e_i) = k_i/N q_i`;
//! * birth-death, `W = sum_j (r k_j + n_j - k_j)`:
//!   `P(k -> k + e_l) = sum_j (r k_j / W) F[j][l] (n_l - k_l)/n_l`,
//!   `P(k -> k - e_l) = sum_j ((n_j - k_j)/W) F[j][l] k_l/n_l`;
//! * Wright-Fisher: `k_i' ~ Binomial(n_i, p_i(k))`, demes independent.

use crate::migration::{self, MatrixIssue, MigrationInput, Needed, StochasticMatrix};
use crate::population::Population;
use serde::{Deserialize, Serialize};

/// The update rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Hash)]
#[serde(rename_all = "snake_case")]
pub enum Rule {
    /// Death-birth (voter-type): a uniformly chosen individual dies and is replaced.
    DeathBirth,
    /// Birth-death (invasion-type): a parent chosen by fitness places offspring.
    BirthDeath,
    /// Wright-Fisher: non-overlapping generations, every deme refilled binomially.
    WrightFisher,
}

impl Rule {
    /// The matrix orientation the rule works with.
    pub fn needs(self) -> Needed {
        match self {
            Rule::BirthDeath => Needed::Dispersal,
            Rule::DeathBirth | Rule::WrightFisher => Needed::Recruitment,
        }
    }

    /// Name used in documents (`death_birth`, ...).
    pub fn as_str(self) -> &'static str {
        match self {
            Rule::DeathBirth => "death_birth",
            Rule::BirthDeath => "birth_death",
            Rule::WrightFisher => "wright_fisher",
        }
    }

    /// Whether time is counted in single events (converted to generations by `/ N`).
    pub fn counts_events(self) -> bool {
        !matches!(self, Rule::WrightFisher)
    }
}

/// Where selection acts when a vacancy is filled (death-birth and Wright-Fisher).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Hash, Default)]
#[serde(rename_all = "snake_case")]
pub enum Scope {
    /// Soft selection: the source deme is drawn by migration, the parent by fitness inside it.
    #[default]
    Deme,
    /// Every candidate parent competes, weighted by migration and fitness.
    Neighbourhood,
}

/// Why a model cannot be built.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ModelError {
    /// The matrix does not match the population or is not a valid migration matrix.
    #[error("invalid migration matrix")]
    Matrix(Vec<MatrixIssue>),
    /// `s <= -1` (or not finite): fitness `1 + s` must be positive.
    #[error("selection coefficient must be finite and greater than -1")]
    Selection,
}

/// A fully specified chain: sizes, the rule's stochastic matrix, rule, scope and fitness.
#[derive(Debug, Clone, PartialEq)]
pub struct Model {
    sizes: Vec<u64>,
    total: u64,
    kernel: StochasticMatrix,
    rule: Rule,
    scope: Scope,
    fitness: f64,
}

impl Model {
    /// Builds a model from a resolved kernel (`B` for death-birth and Wright-Fisher, `F` for
    /// birth-death) and the selection coefficient `s`.
    pub fn new(
        population: &Population,
        kernel: StochasticMatrix,
        rule: Rule,
        scope: Scope,
        s: f64,
    ) -> Result<Self, ModelError> {
        if !s.is_finite() || s <= -1.0 {
            return Err(ModelError::Selection);
        }
        if kernel.dim() != population.demes() {
            return Err(ModelError::Matrix(vec![MatrixIssue::RowCount {
                rows: kernel.dim(),
                expected: population.demes(),
            }]));
        }
        Ok(Self {
            sizes: population.sizes().to_vec(),
            total: population.total(),
            kernel,
            rule,
            scope,
            fitness: 1.0 + s,
        })
    }

    /// Convenience: validates and resolves a migration input for `rule`, then builds.
    pub fn from_input(
        population: &Population,
        input: &MigrationInput,
        rule: Rule,
        scope: Scope,
        s: f64,
    ) -> Result<Self, ModelError> {
        let resolved = migration::resolve(input, population.sizes(), rule.needs())
            .map_err(ModelError::Matrix)?;
        Self::new(population, resolved.matrix, rule, scope, s)
    }

    /// The same chain with another selection coefficient.
    pub fn with_selection(&self, s: f64) -> Result<Self, ModelError> {
        if !s.is_finite() || s <= -1.0 {
            return Err(ModelError::Selection);
        }
        Ok(Self {
            fitness: 1.0 + s,
            ..self.clone()
        })
    }

    /// The same chain (sizes, rule, scope, fitness bit for bit) with another kernel of the
    /// same dimension, e.g. a what-if scenario's.
    pub fn with_kernel(&self, kernel: StochasticMatrix) -> Result<Self, ModelError> {
        if kernel.dim() != self.demes() {
            return Err(ModelError::Matrix(vec![MatrixIssue::RowCount {
                rows: kernel.dim(),
                expected: self.demes(),
            }]));
        }
        Ok(Self {
            sizes: self.sizes.clone(),
            total: self.total,
            kernel,
            rule: self.rule,
            scope: self.scope,
            fitness: self.fitness,
        })
    }

    /// Deme sizes.
    pub fn sizes(&self) -> &[u64] {
        &self.sizes
    }

    /// Number of demes.
    pub fn demes(&self) -> usize {
        self.sizes.len()
    }

    /// Total size `N`.
    pub fn total(&self) -> u64 {
        self.total
    }

    /// The rule's matrix: `B` (row = receiving deme) for death-birth and Wright-Fisher,
    /// `F` (row = sending deme) for birth-death.
    pub fn kernel(&self) -> &StochasticMatrix {
        &self.kernel
    }

    /// Update rule.
    pub fn rule(&self) -> Rule {
        self.rule
    }

    /// Selection scope.
    pub fn scope(&self) -> Scope {
        self.scope
    }

    /// Variant fitness `r = 1 + s`.
    pub fn fitness(&self) -> f64 {
        self.fitness
    }

    /// `(p_i, q_i)`: probability that a newborn placed in deme `i` is a variant, and that it
    /// is a resident. Each is its own sum of non-negative terms, so a move that cannot happen
    /// gets probability exactly 0. Death-birth and Wright-Fisher only.
    pub fn recruitment(&self, k: &[u64], i: usize) -> (f64, f64) {
        let r = self.fitness;
        let n = &self.sizes;
        match self.scope {
            Scope::Deme => {
                let (mut p, mut q) = (0.0, 0.0);
                for (j, b) in self.kernel.row(i) {
                    let mutant = r * k[j] as f64;
                    let resident = (n[j] - k[j]) as f64;
                    let w = mutant + resident;
                    p += b * mutant / w;
                    q += b * resident / w;
                }
                (p, q)
            }
            Scope::Neighbourhood => {
                let (mut a, mut c) = (0.0, 0.0);
                for (j, b) in self.kernel.row(i) {
                    let nj = n[j] as f64;
                    a += b * r * k[j] as f64 / nj;
                    c += b * (n[j] - k[j]) as f64 / nj;
                }
                let w = a + c;
                (a / w, c / w)
            }
        }
    }

    /// Per-event probabilities of `k -> k + e_i` (`up[i]`) and `k -> k - e_i` (`down[i]`)
    /// for death-birth and birth-death. The remainder `1 - sum` is the chance of a null event.
    pub fn event_probabilities(&self, k: &[u64], up: &mut [f64], down: &mut [f64]) {
        let m = self.demes();
        let n = &self.sizes;
        let total = self.total as f64;
        match self.rule {
            Rule::DeathBirth | Rule::WrightFisher => {
                for i in 0..m {
                    let (p, q) = self.recruitment(k, i);
                    up[i] = (n[i] - k[i]) as f64 / total * p;
                    down[i] = k[i] as f64 / total * q;
                }
            }
            Rule::BirthDeath => {
                let r = self.fitness;
                let w: f64 = (0..m).map(|j| r * k[j] as f64 + (n[j] - k[j]) as f64).sum();
                up.iter_mut().for_each(|x| *x = 0.0);
                down.iter_mut().for_each(|x| *x = 0.0);
                // a[l] = sum_j k_j F[j][l], c[l] = sum_j (n_j - k_j) F[j][l]
                for j in 0..m {
                    let (kj, rj) = (k[j] as f64, (n[j] - k[j]) as f64);
                    for (l, f) in self.kernel.row(j) {
                        up[l] += kj * f;
                        down[l] += rj * f;
                    }
                }
                for l in 0..m {
                    let nl = n[l] as f64;
                    up[l] = r * up[l] / w * (n[l] - k[l]) as f64 / nl;
                    down[l] = down[l] / w * k[l] as f64 / nl;
                }
            }
        }
    }

    /// Wright-Fisher refill probabilities `p_i(k)` for every deme.
    pub fn refill_probabilities(&self, k: &[u64], p: &mut [f64]) {
        for (i, out) in p.iter_mut().enumerate() {
            *out = self.recruitment(k, i).0;
        }
    }

    /// Weight of each deme as the birthplace of a uniformly random newborn under the neutral
    /// rule: `n_i / N` for death-birth and Wright-Fisher (deaths, or whole demes, are
    /// uniform), and `sum_j (n_j / N) F[j][i]` for birth-death.
    pub fn birth_weights(&self) -> Vec<f64> {
        let total = self.total as f64;
        match self.rule {
            Rule::DeathBirth | Rule::WrightFisher => {
                self.sizes.iter().map(|&n| n as f64 / total).collect()
            }
            Rule::BirthDeath => {
                let mut t = vec![0.0; self.demes()];
                for j in 0..self.demes() {
                    for (l, f) in self.kernel.row(j) {
                        t[l] += self.sizes[j] as f64 / total * f;
                    }
                }
                t
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn two_demes(rule: Rule, scope: Scope) -> Model {
        let pop = Population::new(vec![3, 5]).unwrap();
        let b = StochasticMatrix::from_weights(&[vec![0.7, 0.3], vec![0.1, 0.9]]).unwrap();
        Model::new(&pop, b, rule, scope, 0.1).unwrap()
    }

    #[test]
    fn recruitment_probabilities_sum_to_one() {
        for scope in [Scope::Deme, Scope::Neighbourhood] {
            let model = two_demes(Rule::DeathBirth, scope);
            for k in [[0, 0], [1, 2], [3, 5], [2, 0]] {
                for i in 0..2 {
                    let (p, q) = model.recruitment(&k, i);
                    assert!((p + q - 1.0).abs() < 1e-15, "{k:?} {i}");
                }
            }
        }
    }

    #[test]
    fn absorbing_states_have_no_moves() {
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let model = two_demes(rule, Scope::Deme);
            let (mut up, mut down) = ([0.0; 2], [0.0; 2]);
            for k in [[0, 0], [3, 5]] {
                model.event_probabilities(&k, &mut up, &mut down);
                assert_eq!(up.iter().chain(&down).sum::<f64>(), 0.0);
            }
        }
    }

    #[test]
    fn one_deme_death_birth_is_the_moran_step() {
        // Moran (1958): T+ = r i (N-i) / (N (r i + N - i)), T- = i (N - i) / (N (r i + N - i)).
        let pop = Population::new(vec![10]).unwrap();
        let b = StochasticMatrix::from_weights(&[vec![1.0]]).unwrap();
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let model = Model::new(&pop, b.clone(), rule, Scope::Deme, 1.0).unwrap();
            let (mut up, mut down) = ([0.0; 1], [0.0; 1]);
            model.event_probabilities(&[3], &mut up, &mut down);
            let w = 2.0 * 3.0 + 7.0;
            assert!((up[0] - 2.0 * 3.0 * 7.0 / (10.0 * w)).abs() < 1e-15);
            assert!((down[0] - 3.0 * 7.0 / (10.0 * w)).abs() < 1e-15);
        }
    }
}
