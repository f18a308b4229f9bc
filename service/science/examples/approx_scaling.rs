//! Wall time of the screening approximations and their gradients on a large sparse population:
//! `m = 2,000` demes, an asymmetric kernel with 5-10 nonzeros per row, sizes log-uniform in
//! `10^3..10^6`, `s = 0.02`, uniform start, all three rules. Also times the weak-selection
//! coefficients (another module) when they accept this size.
//!
//! `cargo run --release -p demefix-science --example approx_scaling [-- DEMES]`

use demefix_science::approx::{branching, strong_migration};
use demefix_science::{weak, Model, Population, Rule, Scope, Start, StochasticMatrix};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::time::Instant;

fn population(m: usize, rule: Rule, s: f64) -> Model {
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    let sizes: Vec<u64> = (0..m)
        .map(|_| 10f64.powf(rng.random_range(3.0..6.0)).round() as u64)
        .collect();
    let rows: Vec<Vec<f64>> = (0..m)
        .map(|i| {
            let mut row = vec![0.0; m];
            // A ring neighbour keeps the kernel irreducible; the rest are random.
            row[(i + 1) % m] = rng.random_range(0.2..1.0);
            let links = rng.random_range(4..=8);
            for _ in 0..links {
                let j = rng.random_range(0..m);
                if j != i {
                    row[j] += rng.random_range(0.05..1.0);
                }
            }
            let out: f64 = row.iter().sum();
            let stay = rng.random_range(0.8..0.99);
            for v in row.iter_mut() {
                *v *= (1.0 - stay) / out;
            }
            row[i] = stay;
            row
        })
        .collect();
    let pop = Population::new(sizes).unwrap();
    let kernel = StochasticMatrix::from_weights(&rows).unwrap();
    Model::new(&pop, kernel, rule, Scope::Deme, s).unwrap()
}

fn main() {
    let m: usize = std::env::args()
        .nth(1)
        .map(|a| a.parse().expect("DEMES must be a number"))
        .unwrap_or(2000);
    println!("m = {m}, s = 0.02, uniform start");
    for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
        let model = population(m, rule, 0.02);
        let weights = Start::Uniform.deme_weights(&model);
        let all = Instant::now();

        let t = Instant::now();
        let b = branching::establishment(&model).unwrap();
        let t_b = t.elapsed().as_secs_f64();
        let t = Instant::now();
        let gb = b.gradient(&model, &weights).unwrap();
        let t_gb = t.elapsed().as_secs_f64();

        let t = Instant::now();
        let sm = strong_migration::fixation(&model).unwrap();
        let t_s = t.elapsed().as_secs_f64();
        let t = Instant::now();
        let gs = sm.gradient(&model, &weights).unwrap();
        let t_gs = t.elapsed().as_secs_f64();

        let t = Instant::now();
        let w = weak::first_order(&model);
        let t_w = t.elapsed().as_secs_f64();
        let total = all.elapsed().as_secs_f64();

        println!(
            "{:<14} nnz {:>6} | branching {:.3} s (newton {}), gradient {:.3} s, \
             uniform q = {:.5e}, inside {} | strong migration {:.3} s, gradient {:.3} s, \
             uniform u = {:.5e}, N_e/N = {:.3}, inside {} | weak selection {:.3} s ({}) | \
             total {:.3} s | partials {} / {}",
            rule.as_str(),
            model.kernel().nnz(),
            t_b,
            b.newton_steps,
            t_gb,
            b.combine(&weights),
            b.regime.inside,
            t_s,
            t_gs,
            sm.combine(&weights),
            sm.effective_size / model.total() as f64,
            sm.regime.inside,
            t_w,
            match &w {
                Ok(_) => "ok".to_string(),
                Err(e) => format!("refused: {e}"),
            },
            total,
            gb.entries.len(),
            gs.entries.len(),
        );
        if !sm.regime.inside {
            println!("  strong migration outside: {:?}", sm.regime.reasons);
        }
        if !b.regime.inside {
            println!("  branching outside: {:?}", b.regime.reasons);
        }
    }
}
