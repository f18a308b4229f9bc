//! Screening approximations of fixation probabilities, each with the regime where it holds.
//!
//! This module owns two approximations for large structured populations, both of which scale
//! to thousands of demes with sparse kernels, and their gradients with respect to the kernel:
//!
//! * [`branching`]: the multi-type branching (establishment) probability, types = demes, with
//!   each rule's offspring law of a rare variant lineage (references.md §6.2; Pollak 1966,
//!   J. Appl. Probab. 3:142-155, for multi-type branching in subdivided populations);
//! * [`strong_migration`]: Nagylaki's (1980, J. Math. Biol. 9:101-114) strong-migration limit,
//!   a panmictic diffusion for the reproductive-value-weighted frequency with an effective
//!   size and an effective selection coefficient, solved by Kimura's (1962, Genetics
//!   47:713-719) formula.
//!
//! Every answer carries a [`ValidRegime`]: the named indicators the approximation depends on,
//! their values, the thresholds (named constants in each submodule, with the reason) and, when
//! an indicator is outside its threshold, a sentence saying why the answer should not be
//! trusted. Gradients are raw partial derivatives `∂f/∂K_ij` of a start-weighted answer
//! `f = sum_k w_k u_k` with respect to the rule's kernel `K`
//! ([`crate::sensitivity::KernelPartials`]).

pub mod branching;
mod linear;
pub mod strong_migration;

use crate::migration::StochasticMatrix;
use serde::Serialize;

/// A threshold an indicator must respect for the approximation to be trusted.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case", tag = "kind", content = "value")]
pub enum Limit {
    /// The value must be at least this.
    AtLeast(f64),
    /// The value must be at most this.
    AtMost(f64),
    /// The value must be strictly greater than this.
    Above(f64),
}

impl Limit {
    /// Whether `value` respects the limit (NaN never does).
    pub fn holds(self, value: f64) -> bool {
        match self {
            Limit::AtLeast(t) => value >= t,
            Limit::AtMost(t) => value <= t,
            Limit::Above(t) => value > t,
        }
    }
}

/// One named quantity an approximation's accuracy depends on.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Indicator {
    /// Short name, e.g. `ne_s` or `max_inverse_local_selection`.
    pub name: &'static str,
    /// Its value for this model.
    pub value: f64,
    /// The threshold, `None` for a purely informative indicator.
    pub limit: Option<Limit>,
    /// Whether the value respects the limit (always `true` without a limit).
    pub inside: bool,
}

/// Where an approximation holds, computed for one model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ValidRegime {
    /// Name of the approximation (`branching`, `strong_migration` or `weak_selection`).
    pub approximation: &'static str,
    /// The indicators, in a fixed order per approximation.
    pub indicators: Vec<Indicator>,
    /// Whether every indicator is inside its limit.
    pub inside: bool,
    /// One sentence per indicator outside its limit, saying what goes wrong.
    pub reasons: Vec<String>,
}

impl ValidRegime {
    /// Starts an empty regime (inside until an indicator says otherwise).
    pub(crate) fn new(approximation: &'static str) -> Self {
        Self {
            approximation,
            indicators: Vec::new(),
            inside: true,
            reasons: Vec::new(),
        }
    }

    /// Adds an indicator; when it violates `limit`, records `reason` (a sentence).
    pub(crate) fn check(
        &mut self,
        name: &'static str,
        value: f64,
        limit: Option<Limit>,
        reason: &str,
    ) {
        let inside = limit.is_none_or(|l| l.holds(value));
        if !inside {
            self.inside = false;
            self.reasons.push(format!("{name} = {value:.4e}: {reason}"));
        }
        self.indicators.push(Indicator {
            name,
            value,
            limit,
            inside,
        });
    }

    /// The indicator called `name`, if present.
    pub fn indicator(&self, name: &str) -> Option<&Indicator> {
        self.indicators.iter().find(|i| i.name == name)
    }
}

/// Why an approximation cannot be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ApproxError {
    /// The kernel has no unique positive reproductive value (it is reducible).
    #[error("the migration kernel has no unique positive reproductive value (reducible)")]
    NoReproductiveValue,
    /// The fixed-point solve did not reach its tolerance.
    #[error("the branching fixed point did not converge (residual {residual:e})")]
    NotConverged {
        /// Largest remaining `|q - G(q)|`.
        residual: f64,
    },
    /// Under birth-death, no offspring ever settles in this deme, so its members never die.
    #[error("deme {deme} receives no offspring: its individuals are never replaced")]
    NeverReplaced {
        /// The deme.
        deme: usize,
    },
    /// A linear system of the gradient is singular.
    #[error("the adjoint system of the gradient is singular")]
    SingularAdjoint,
    /// A vector has the wrong length.
    #[error("expected {expected} entries, got {got}")]
    Length {
        /// Number of demes.
        expected: usize,
        /// Entries received.
        got: usize,
    },
    /// The gradient was asked of a model other than the one the answer was computed for.
    #[error("the model does not match the one the approximation was computed for")]
    ModelMismatch,
}

/// The structural entries of a kernel: every nonzero and every diagonal entry, each once, in
/// row-major order (the layout of [`crate::sensitivity::KernelPartials`]).
pub(crate) fn structural_entries(kernel: &StochasticMatrix) -> Vec<(usize, usize)> {
    let mut out = Vec::with_capacity(kernel.nnz() + kernel.dim());
    for i in 0..kernel.dim() {
        let mut diagonal = false;
        for (j, _) in kernel.row(i) {
            if !diagonal && j > i {
                out.push((i, i));
                diagonal = true;
            }
            if j == i {
                diagonal = true;
            }
            out.push((i, j));
        }
        if !diagonal {
            out.push((i, i));
        }
    }
    out
}

/// Checks a start-weight vector's length.
fn check_len(expected: usize, got: usize) -> Result<(), ApproxError> {
    if expected == got {
        Ok(())
    } else {
        Err(ApproxError::Length { expected, got })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn structural_entries_cover_nonzeros_and_the_diagonal_once_in_row_order() {
        let k = StochasticMatrix::from_weights(&[
            vec![0.0, 1.0, 1.0],
            vec![1.0, 1.0, 0.0],
            vec![1.0, 1.0, 0.0],
        ])
        .unwrap();
        assert_eq!(
            structural_entries(&k),
            vec![
                (0, 0),
                (0, 1),
                (0, 2),
                (1, 0),
                (1, 1),
                (2, 0),
                (2, 1),
                (2, 2)
            ]
        );
    }

    #[test]
    fn a_violated_limit_makes_the_regime_outside_with_a_reason() {
        let mut r = ValidRegime::new("test");
        r.check("a", 1.0, Some(Limit::AtLeast(0.5)), "fine");
        assert!(r.inside);
        r.check("b", 1.0, Some(Limit::AtMost(0.5)), "too big");
        r.check("c", f64::NAN, None, "informative");
        assert!(!r.inside);
        assert_eq!(r.reasons.len(), 1);
        assert!(r.reasons[0].contains("too big"));
    }
}
