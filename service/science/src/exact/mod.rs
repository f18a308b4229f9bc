//! Exact method: the Markov chain over count vectors, solved as a linear system.
//!
//! The state is the count vector `k` (`0 <= k_i <= n_i`, `prod (n_i + 1)` states); individuals
//! are never enumerated. The module owns:
//!
//! * [`space`]: mixed-radix numbering of the count vectors, and which of them can still fix;
//! * [`assembly`]: the sparse system `A = I - Q` of death-birth and birth-death;
//! * [`sparse`]: its direct (sparse LU) and iterative (BiCGSTAB) solvers, with the
//!   preconditioners of [`precond`] on the count-ordered system of [`levels`];
//! * [`dense`]: the dense Wright-Fisher chain and its dense LU solve;
//! * this file: the public contract, solver selection and the per-deme answers.
//!
//! Death-birth and birth-death count events and report generations = events / `N`;
//! Wright-Fisher counts generations.

mod assembly;
mod dense;
mod gradient;
mod levels;
mod precond;
mod space;
mod sparse;

use crate::model::{Model, Rule};
use crate::reach;
use crate::sensitivity::KernelPartials;
use crate::start::DemeAnswer;
use rayon::prelude::*;
use space::{SpreadClosure, StateSpace};

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
    /// Target relative residual of the iterative solver (default 1e-10: on three demes of
    /// 45-47 the answers then differ from those at 1e-12 by 3e-11 relative, for a sixth fewer
    /// iterations). Every solution's residual is recomputed explicitly and reported.
    pub tolerance: f64,
}

impl Default for ExactConfig {
    fn default() -> Self {
        Self {
            max_states: 2_000_000,
            max_dense_states: 3_000,
            solver: SolverChoice::Auto,
            tolerance: 1e-10,
        }
    }
}

/// What the solver did, for the result document.
#[derive(Debug, Clone, PartialEq)]
pub struct SolverReport {
    /// Solver name: `sparse_lu`, `bicgstab_two_level_ilu0`, `dense_lu` or `none`.
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
    /// The requested computation is not available for this rule.
    #[error("{0}")]
    Unsupported(&'static str),
    /// The linear solver failed to reach the tolerance.
    #[error("the linear solver did not converge (relative residual {residual:e})")]
    NotConverged {
        /// Achieved relative residual.
        residual: f64,
    },
}

/// Largest estimated LU fill (transient states x bandwidth) for which [`SolverChoice::Auto`]
/// factorises directly; above it the iterative solver is used. Measured on this project's
/// 2-core machine: two demes (315, 316), about 10^5 states and estimate 3.2e7, factorise in
/// 1.6 s and 0.2 GiB; three demes (45, 46, 47), 10^5 states and estimate 2.2e8, need 64 s and
/// 4 GiB directly but 3.3 s iteratively (106 iterations, ILU(0)-smoothed two-level).
pub const DIRECT_FILL_LIMIT: f64 = 1.0e8;

/// Largest estimated LU work (transient states x bandwidth^2) for which [`SolverChoice::Auto`]
/// factorises directly. Binary-digit state spaces of graphs have a bandwidth of half the states:
/// a 13-node graph (8,192 states, fill estimate 3.4e7, work 1.4e11) took 20 s and 0.5 GiB
/// directly against well under a second iteratively; the two-deme 10^5 chain above has work
/// 1e10 and factorises in 1.5 s.
pub const DIRECT_WORK_LIMIT: f64 = 2.0e10;

/// Preconditioner of the iterative solver: ILU(0) smoothing around the exact total-count coarse
/// solve. Iterations summed over the three systems at relative residual 1e-12 on three demes
/// of 99 (10^6 states, death-birth): Jacobi 1433, Jacobi-smoothed two-level 444, this 141;
/// on three demes of 45-47: two-level 408, ILU(0) alone 295, this 128.
const ITERATIVE_PRECONDITIONER: sparse::Preconditioner = sparse::Preconditioner::TwoLevelIlu0;

/// Largest state space the exact method handles at all: state indices are stored in 32 bits.
const INDEX_LIMIT: u64 = u32::MAX as u64;

/// Number of states of the exact chain for `model`, or the error that the limit applies.
pub fn check_size(model: &Model, config: &ExactConfig) -> Result<u64, ExactError> {
    let limit = match model.rule() {
        Rule::WrightFisher => config.max_dense_states,
        Rule::DeathBirth | Rule::BirthDeath => config.max_states,
    }
    .min(INDEX_LIMIT);
    let states = model
        .sizes()
        .iter()
        .try_fold(1u64, |acc, &n| acc.checked_mul(n.checked_add(1)?));
    match states {
        Some(states) if states <= limit => Ok(states),
        states => Err(ExactError::TooManyStates { states, limit }),
    }
}

/// Estimated fill of a sparse LU of the event system: transient states times bandwidth.
pub fn estimated_fill(model: &Model) -> Option<f64> {
    let space = StateSpace::new(model.sizes())?;
    Some(space.transient() as f64 * space.bandwidth() as f64)
}

/// The checked size and the numbering of the chain's state space.
fn state_space(model: &Model, config: &ExactConfig) -> Result<(u64, StateSpace), ExactError> {
    let states = check_size(model, config)?;
    let space = StateSpace::new(model.sizes()).ok_or(ExactError::TooManyStates {
        states: Some(states),
        limit: INDEX_LIMIT,
    })?;
    Ok((states, space))
}

fn failure(f: sparse::SolveFailure) -> ExactError {
    match f {
        sparse::SolveFailure::Residual(residual) => ExactError::NotConverged { residual },
    }
}

/// Whether the event system of `space` is factorised directly (see [`DIRECT_FILL_LIMIT`]
/// and [`DIRECT_WORK_LIMIT`]).
fn use_direct(space: &StateSpace, config: &ExactConfig) -> bool {
    let fill = space.transient() as f64 * space.bandwidth() as f64;
    let work = fill * space.bandwidth() as f64;
    match config.solver {
        SolverChoice::Direct => true,
        SolverChoice::Iterative => false,
        SolverChoice::Auto => fill <= DIRECT_FILL_LIMIT && work <= DIRECT_WORK_LIMIT,
    }
}

/// Solves the chain for fixation probability, mean absorption time and mean conditional
/// fixation time from a single variant in each deme.
pub fn solve(model: &Model, config: &ExactConfig) -> Result<ExactSolution, ExactError> {
    let (states, space) = state_space(model, config)?;
    let (mut solutions, solver, nonzeros) = if space.transient() == 0 {
        let empty = sparse::Solutions {
            h: Vec::new(),
            t: Vec::new(),
            w: Vec::new(),
            residual: 0.0,
            iterations: None,
        };
        (empty, "none", 0)
    } else {
        match model.rule() {
            Rule::WrightFisher => {
                let (solutions, nonzeros) = dense::solve(model, &space).map_err(failure)?;
                (solutions, "dense_lu", nonzeros)
            }
            Rule::DeathBirth | Rule::BirthDeath => {
                let system = assembly::EventSystem::assemble(model, &space);
                let nonzeros = system.nonzeros();
                if use_direct(&space, config) {
                    (
                        sparse::direct(&system).map_err(failure)?,
                        "sparse_lu",
                        nonzeros,
                    )
                } else {
                    let preconditioner = ITERATIVE_PRECONDITIONER;
                    let solutions =
                        sparse::iterative(&system, &space, preconditioner, config.tolerance)
                            .map_err(failure)?;
                    (solutions, preconditioner.solver_name(), nonzeros)
                }
            }
        }
    };
    clear_unfixable(model, &space, &mut solutions);

    let unreachable = reach::unreachable_from_each(model);
    let steps_per_generation = if model.rule().counts_events() {
        model.total() as f64
    } else {
        1.0
    };
    let per_deme = (0..model.demes())
        .map(|deme| {
            let start = space.single(deme);
            if start == space.fixed() {
                // A single individual in total: the variant has already fixed.
                return DemeAnswer {
                    fixation_probability: 1.0,
                    mean_absorption_generations: 0.0,
                    mean_fixation_generations: 0.0,
                };
            }
            let i = start - 1;
            let h = if unreachable[deme].is_empty() {
                probability(solutions.h[i])
            } else {
                0.0
            };
            DemeAnswer {
                fixation_probability: h,
                mean_absorption_generations: solutions.t[i] / steps_per_generation,
                mean_fixation_generations: if h > 0.0 {
                    solutions.w[i] / h / steps_per_generation
                } else {
                    f64::NAN
                },
            }
        })
        .collect();
    Ok(ExactSolution {
        per_deme,
        report: SolverReport {
            solver: solver.to_string(),
            relative_residual: solutions.residual,
            states,
            nonzeros: nonzeros as u64,
            iterations: solutions.iterations,
        },
    })
}

/// A solved fixation probability as a probability: the linear solve's round-off can carry an
/// answer within about 1e-15 of 0 or 1 just outside `[0, 1]` (near-certain fixation under
/// strong selection); it is put back on the bound. `NaN` stays `NaN`.
fn probability(h: f64) -> f64 {
    h.clamp(0.0, 1.0)
}

/// Sets `h` and `w` to exactly 0 on the states from which fixation cannot be reached (only
/// possible when the spread graph is not strongly connected); the solvers give round-off there.
fn clear_unfixable(model: &Model, space: &StateSpace, solutions: &mut sparse::Solutions) {
    let Some(closure) = SpreadClosure::new(model) else {
        return;
    };
    if closure.connected() {
        return;
    }
    const CHUNK: usize = 4096;
    solutions
        .h
        .par_chunks_mut(CHUNK)
        .zip(solutions.w.par_chunks_mut(CHUNK))
        .enumerate()
        .for_each(|(c, (h, w))| {
            let mut k = vec![0u64; space.demes()];
            space.decode(c * CHUNK + 1, &mut k);
            for (h, w) in h.iter_mut().zip(w.iter_mut()) {
                if !closure.can_fix(&k) {
                    *h = 0.0;
                    *w = 0.0;
                }
                space.advance(&mut k);
            }
        });
}

/// Exact answers for one start weighting, with their partial derivatives with respect to the
/// kernel (at [`KernelPartials::structural_entries`]).
#[derive(Debug, Clone, PartialEq)]
pub struct ExactSensitivity {
    /// The start-weighted answer (as [`crate::start::combine`] mixes the per-deme ones).
    pub answer: DemeAnswer,
    /// Partials of the fixation probability.
    pub d_fixation_probability: KernelPartials,
    /// Partials of the mean absorption time, in generations.
    pub d_mean_absorption_generations: KernelPartials,
    /// Partials of the mean conditional fixation time, in generations (all `NaN` when
    /// fixation is impossible).
    pub d_mean_fixation_generations: KernelPartials,
    /// Solver details (the residual covers the adjoint systems too).
    pub report: SolverReport,
}

/// The exact answers for a variant starting in deme `k` with probability `weights[k]`, and
/// their gradients with respect to every kernel entry, from one factorisation (or, on the
/// iterative path, two extra adjoint solves): see [`gradient`] for the formulas. Death-birth and
/// birth-death only.
pub fn sensitivity(
    model: &Model,
    config: &ExactConfig,
    weights: &[f64],
) -> Result<ExactSensitivity, ExactError> {
    if model.rule() == Rule::WrightFisher {
        return Err(ExactError::Unsupported(
            "exact sensitivities are computed for death-birth and birth-death only",
        ));
    }
    assert_eq!(weights.len(), model.demes(), "one weight per deme");
    let (states, space) = state_space(model, config)?;
    if space.transient() == 0 {
        return Err(ExactError::Unsupported(
            "a population of one individual has no chain to differentiate",
        ));
    }
    let entries = KernelPartials::structural_entries(model.kernel());
    let m = model.demes();
    // The objective: the weighted single-variant states. A start that cannot fix reaches only
    // states where `h` is exactly 0 (after `clear_unfixable`), so it adds nothing to the
    // fixation partials and its share of the absorption time is kept.
    let mut c = vec![0.0; space.transient()];
    for (deme, &weight) in weights.iter().enumerate() {
        let start = space.single(deme);
        if weight != 0.0 && start != space.fixed() {
            c[start - 1] += weight;
        }
    }
    let system = assembly::EventSystem::assemble(model, &space);
    let (mut solutions, pair, solver) = if use_direct(&space, config) {
        let (solutions, pair) = sparse::direct_with_adjoint(&system, Some(&c)).map_err(failure)?;
        (solutions, pair.expect("asked for the adjoint"), "sparse_lu")
    } else {
        let preconditioner = ITERATIVE_PRECONDITIONER;
        let solutions = sparse::iterative(&system, &space, preconditioner, config.tolerance)
            .map_err(failure)?;
        let pair = sparse::iterative_adjoint(&system, &space, preconditioner, &c, config.tolerance)
            .map_err(failure)?;
        (solutions, pair, preconditioner.solver_name())
    };
    clear_unfixable(model, &space, &mut solutions);
    let fields = gradient::Fields {
        h: &solutions.h,
        t: &solutions.t,
        w: &solutions.w,
        g: &pair.g,
        u: &pair.u,
    };
    let partials = gradient::partials(model, &space, &fields, &entries);
    let dot = |x: &[f64]| c.iter().zip(x).map(|(a, b)| a * b).sum::<f64>();
    let (h, t, w) = (
        probability(dot(&solutions.h)),
        dot(&solutions.t),
        dot(&solutions.w),
    );
    let steps = model.total() as f64;
    let tau = if h > 0.0 { w / h } else { f64::NAN };
    let d_tau: Vec<f64> = partials
        .w
        .iter()
        .zip(&partials.h)
        .map(|(dw, dh)| (dw - tau * dh) / h / steps)
        .collect();
    let d_t: Vec<f64> = partials.t.iter().map(|x| x / steps).collect();
    Ok(ExactSensitivity {
        answer: DemeAnswer {
            fixation_probability: h,
            mean_absorption_generations: t / steps,
            mean_fixation_generations: tau / steps,
        },
        d_fixation_probability: KernelPartials::from_values(m, &entries, &partials.h),
        d_mean_absorption_generations: KernelPartials::from_values(m, &entries, &d_t),
        d_mean_fixation_generations: KernelPartials::from_values(m, &entries, &d_tau),
        report: SolverReport {
            solver: solver.to_string(),
            relative_residual: solutions.residual.max(pair.residual),
            states,
            nonzeros: system.nonzeros() as u64,
            iterations: match (solutions.iterations, pair.iterations) {
                (Some(a), Some(b)) => Some(a + b),
                _ => None,
            },
        },
    })
}
