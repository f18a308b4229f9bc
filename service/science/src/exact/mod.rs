//! Exact method: the Markov chain over count vectors, solved as a sparse linear system.
//!
//! OWNER: exact-solver helper. Public signatures below are the contract used by the rest of
//! the project; fields may be added, not renamed or removed.

use crate::model::Model;
use crate::start::DemeAnswer;

/// Which linear solver to use.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum SolverChoice {
    /// Sparse direct LU when the estimated fill-in fits, preconditioned Krylov otherwise.
    #[default]
    Auto,
    /// Sparse direct LU.
    Direct,
    /// Preconditioned iterative solver.
    Iterative,
}

/// Limits and solver settings for the exact method.
#[derive(Debug, Clone, PartialEq)]
pub struct ExactConfig {
    /// Largest number of count vectors the exact method accepts (default 2,000,000).
    pub max_states: u64,
    /// Largest state space for Wright-Fisher, whose transition matrix is dense.
    pub max_dense_states: u64,
    /// Solver selection.
    pub solver: SolverChoice,
    /// Target relative residual of the iterative solver.
    pub tolerance: f64,
}

impl Default for ExactConfig {
    fn default() -> Self {
        Self {
            max_states: 2_000_000,
            max_dense_states: 3_000,
            solver: SolverChoice::Auto,
            tolerance: 1e-12,
        }
    }
}

/// What the solver did, for the result document.
#[derive(Debug, Clone, PartialEq)]
pub struct SolverReport {
    /// Solver name, e.g. `sparse_lu` or `bicgstab_jacobi`.
    pub solver: String,
    /// Largest achieved relative residual `||b - A x|| / ||b||` over the solved systems.
    pub relative_residual: f64,
    /// Number of count vectors.
    pub states: u64,
    /// Stored nonzeros of the system matrix.
    pub nonzeros: u64,
    /// Iterations of the iterative solver (summed over systems), `None` for direct.
    pub iterations: Option<usize>,
}

/// Per-deme exact answers for one variant placed in each deme.
#[derive(Debug, Clone, PartialEq)]
pub struct ExactSolution {
    /// Answer for a single variant starting in deme `i`, in deme order.
    pub per_deme: Vec<DemeAnswer>,
    /// Solver details.
    pub report: SolverReport,
}

/// Why the exact method cannot answer.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ExactError {
    /// The state space is larger than the configured limit (`None`: it overflows 64 bits).
    #[error("the exact chain would have {states:?} states, above the limit of {limit}")]
    TooManyStates {
        /// Number of states, if it fits in 64 bits.
        states: Option<u64>,
        /// The limit that applies to this rule.
        limit: u64,
    },
    /// The linear solver failed to reach the tolerance.
    #[error("the linear solver did not converge (relative residual {residual:e})")]
    NotConverged {
        /// Achieved relative residual.
        residual: f64,
    },
}

/// Number of states of the exact chain for `model`, or the error that the limit applies.
pub fn check_size(model: &Model, config: &ExactConfig) -> Result<u64, ExactError> {
    let _ = (model, config);
    unimplemented!("exact::check_size")
}

/// Solves the chain for fixation probability, mean absorption time and mean conditional
/// fixation time from a single variant in each deme.
pub fn solve(model: &Model, config: &ExactConfig) -> Result<ExactSolution, ExactError> {
    let _ = (model, config);
    unimplemented!("exact::solve")
}
