//! `method.approximations`: which screening approximations a job computes, and in which order
//! of preference.
//!
//! This module owns the names of the screening approximations as jobs and documents write
//! them, their default order, and the validation of the optional list. When a job does not
//! send the member, every approximation is computed in [`DEFAULT_ORDER`] and the accepted spec
//! leaves the member out (so jobs written before it existed keep their `spec_sha256`).

use super::walk::Walker;
use crate::problem::Pointer;
use serde::Serialize;
use serde_json::Value;

/// One screening approximation (references.md §5-6).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ApproximationName {
    /// First-order weak-selection coefficients, `rho(s) ≈ rho(0) + s rho'(0)`.
    WeakSelection,
    /// Nagylaki's strong-migration limit with Kimura's formula.
    StrongMigration,
    /// Multi-type branching establishment probability.
    Branching,
}

/// Every approximation, in the default order of preference for the primary result of
/// `method.kind = approximation`: the weak-selection expansion is exact to first order in
/// `s` for any structure and sizes; the strong-migration limit keeps drift (Kimura's
/// formula) but averages the structure; branching keeps the structure but describes only
/// establishment in large demes.
pub const DEFAULT_ORDER: [ApproximationName; 3] = [
    ApproximationName::WeakSelection,
    ApproximationName::StrongMigration,
    ApproximationName::Branching,
];

impl ApproximationName {
    /// The name as jobs and documents write it.
    pub fn as_str(self) -> &'static str {
        match self {
            ApproximationName::WeakSelection => "weak_selection",
            ApproximationName::StrongMigration => "strong_migration",
            ApproximationName::Branching => "branching",
        }
    }

    /// The `method` of a result or link row it answers: `approximation:<name>`.
    pub fn method(self) -> &'static str {
        match self {
            ApproximationName::WeakSelection => "approximation:weak_selection",
            ApproximationName::StrongMigration => "approximation:strong_migration",
            ApproximationName::Branching => "approximation:branching",
        }
    }

    fn parse(name: &str) -> Option<Self> {
        DEFAULT_ORDER.into_iter().find(|a| a.as_str() == name)
    }
}

/// `method.approximations` at `at`: a list of distinct names, each problem at its own
/// pointer. `None` after a problem.
pub(super) fn parse(w: &mut Walker, v: &Value, at: &Pointer) -> Option<Vec<ApproximationName>> {
    let list = w.array(v, at)?;
    let before = w.count();
    let mut out: Vec<(ApproximationName, usize)> = Vec::with_capacity(list.len());
    for (k, item) in list.iter().enumerate() {
        let item_at = at.index(k);
        let Some(name) = w.string(item, &item_at) else {
            continue;
        };
        let Some(found) = ApproximationName::parse(name) else {
            let known: Vec<&str> = DEFAULT_ORDER.iter().map(|a| a.as_str()).collect();
            w.report(
                &item_at,
                format!(
                    "`{name}` is not a screening approximation: one of {}",
                    known.join(", ")
                ),
            );
            continue;
        };
        if let Some((_, first)) = out.iter().find(|(a, _)| *a == found) {
            w.report(
                &item_at,
                format!("`{name}` is listed twice (also at index {first})"),
            );
            continue;
        }
        out.push((found, k));
    }
    (w.count() == before).then(|| out.into_iter().map(|(a, _)| a).collect())
}
