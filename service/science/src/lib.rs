//! Pure numerical core of demefix.
//!
//! This crate owns the population model (demes, migration matrices, update rules) and every
//! method that computes fixation probabilities and times from it: the exact Markov chain over
//! count vectors ([`exact`]), seeded simulation ensembles ([`ensemble`]), the first-order
//! weak-selection expansion ([`weak`]) and the well-mixed references ([`well_mixed`]).
//!
//! It performs no I/O, spawns no async runtime and logs nothing: callers pass progress
//! observers and cancellation flags in, and receive typed results and typed errors back.
//! The model contract it implements is written down in the project's `DEVELOPERS.md`.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod approx;
pub mod ensemble;
pub mod exact;
pub mod migration;
pub mod model;
pub mod population;
pub mod reach;
pub mod sensitivity;
pub mod start;
pub mod stats;
pub mod weak;
pub mod well_mixed;
pub mod whatif;

pub use migration::{MatrixIssue, MigrationInput, Orientation, SelfFlows, StochasticMatrix};
pub use model::{Model, ModelError, Rule, Scope};
pub use population::Population;
pub use start::Start;

/// Version of the numerical methods. Bump whenever any numeric output for a fixed input,
/// seed and version could change (a new sampling algorithm, a different solver tolerance).
pub const METHOD_VERSION: &str = "0.3.1";
