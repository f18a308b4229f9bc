//! Time and peak memory of the first-order weak-selection coefficients (all `m` starts) and
//! of one start-weighted gradient, on sparse asymmetric kernels.
//!
//! Run: `cargo run --release -p demefix-science --example weak_scaling [m ...]`
//! (default `200 500 1000 2000`). Each deme keeps a retention in `[0.5, 0.95]` and sends the
//! rest to 4-9 random other demes (plus the next deme, so the graph is strongly connected)
//! with random weights; sizes are log-uniform in `[10^3, 10^6]`. Memory is the process's
//! peak resident size (`VmHWM` of `/proc/self/status`), so it only grows along the run.

use demefix_science::weak::{self, WeakConfig};
use demefix_science::{Model, Population, Rule, Scope, StochasticMatrix};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::time::Instant;

fn peak_memory_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|v| v.parse::<f64>().ok())
        })
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

fn population(m: usize, seed: u64) -> (Vec<u64>, Vec<Vec<f64>>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let sizes: Vec<u64> = (0..m)
        .map(|_| 10f64.powf(rng.random_range(3.0..6.0)).round() as u64)
        .collect();
    let mut rows = vec![vec![0.0; m]; m];
    for (i, row) in rows.iter_mut().enumerate() {
        let retention: f64 = rng.random_range(0.5..0.95);
        let links = rng.random_range(4..10usize);
        let mut targets = vec![(i + 1) % m];
        while targets.len() < links.min(m - 1) {
            let j = rng.random_range(0..m);
            if j != i && !targets.contains(&j) {
                targets.push(j);
            }
        }
        let weights: Vec<f64> = targets.iter().map(|_| rng.random_range(0.1..1.0)).collect();
        let sum: f64 = weights.iter().sum();
        row[i] = retention;
        for (&j, w) in targets.iter().zip(&weights) {
            row[j] += (1.0 - retention) * w / sum;
        }
    }
    (sizes, rows)
}

fn main() {
    let sizes_arg: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let ms = if sizes_arg.is_empty() {
        vec![200, 500, 1000, 2000]
    } else {
        sizes_arg
    };
    println!(
        "threads {}; columns: m rule scope | coefficients s iters residual | gradient s iters residual | peak MB",
        rayon::current_num_threads()
    );
    let config = WeakConfig::default();
    for &m in &ms {
        let (sizes, rows) = population(m, 17 + m as u64);
        let pop = Population::new(sizes).unwrap();
        let kernel = StochasticMatrix::from_weights(&rows).unwrap();
        for (rule, scope) in [
            (Rule::DeathBirth, Scope::Deme),
            (Rule::DeathBirth, Scope::Neighbourhood),
            (Rule::WrightFisher, Scope::Deme),
            (Rule::BirthDeath, Scope::Deme),
        ] {
            let model = Model::new(&pop, kernel.clone(), rule, scope, 0.0).unwrap();
            let start = Instant::now();
            let solved = weak::first_order_with(&model, &config).unwrap();
            let coefficients = start.elapsed().as_secs_f64();
            let weights = vec![1.0 / m as f64; m];
            let start = Instant::now();
            let grad = weak::gradient(&model, &weights, &config).unwrap();
            let gradient = start.elapsed().as_secs_f64();
            let (_, slope) = solved.coefficients.combine(&weights);
            println!(
                "{m:5} {:13} {:13} | {coefficients:7.2} {:5} {:8.1e} | {gradient:7.2} {:5} {:8.1e} | {:7.0}   (mean slope {slope:.6}, gradient slope {:.6})",
                rule.as_str(),
                format!("{scope:?}"),
                solved.info.iterations,
                solved.info.residual,
                grad.info.iterations,
                grad.info.residual,
                peak_memory_mb(),
                grad.slope,
            );
        }
    }
}
