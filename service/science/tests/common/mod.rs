//! Fixtures shared by the science crate's integration tests.
#![allow(dead_code)] // each test binary uses only some of them

use demefix_science::{Model, Population, Rule, Scope, StochasticMatrix};

/// A model from deme sizes and rows of non-negative weights (each row divided by its sum).
pub fn model(sizes: Vec<u64>, rows: &[Vec<f64>], rule: Rule, scope: Scope, s: f64) -> Model {
    let pop = Population::new(sizes).unwrap();
    Model::new(
        &pop,
        StochasticMatrix::from_weights(rows).unwrap(),
        rule,
        scope,
        s,
    )
    .unwrap()
}

/// Adjacency rows of a star with `leaves` leaves, node 0 the centre, no self-loops.
pub fn star(leaves: usize) -> Vec<Vec<f64>> {
    (0..=leaves)
        .map(|i| {
            (0..=leaves)
                .map(|j| if (i == 0) != (j == 0) { 1.0 } else { 0.0 })
                .collect()
        })
        .collect()
}

/// Adjacency rows of the cycle on `n` nodes.
pub fn cycle(n: usize) -> Vec<Vec<f64>> {
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

/// Adjacency rows of the complete graph on `n` nodes, no self-loops.
pub fn complete(n: usize) -> Vec<Vec<f64>> {
    (0..n)
        .map(|i| (0..n).map(|j| if i == j { 0.0 } else { 1.0 }).collect())
        .collect()
}
