//! Benchmarks of the ensemble method (`cargo bench -p demefix-science --bench ensemble`).
//! Short: each iteration runs a small chunk of replicates on one thread.

use demefix_science::ensemble::{EnsembleConfig, EnsembleJob, Scheme};
use demefix_science::{Model, Population, Rule, Scope, Start, StochasticMatrix};

fn main() {
    divan::main();
}

fn model(m: usize, size: u64, rule: Rule) -> Model {
    let rows: Vec<Vec<f64>> = (0..m)
        .map(|i| {
            (0..m)
                .map(|j| {
                    if i == j {
                        4.0
                    } else {
                        1.0 + (i * 7 + j * 3) as f64 % 5.0
                    }
                })
                .collect()
        })
        .collect();
    let pop = Population::new(vec![size; m]).unwrap();
    Model::new(
        &pop,
        StochasticMatrix::from_weights(&rows).unwrap(),
        rule,
        Scope::Deme,
        0.1,
    )
    .unwrap()
}

fn run_chunk(model: &Model, replicates: u64) -> u64 {
    let config = EnsembleConfig {
        seed: 1,
        replicates,
        chunk_size: replicates,
        target_half_width: None,
        max_generations: 1_000_000,
        arrival_fractions: vec![0.5],
        scheme: Scheme::Auto,
    };
    let job = EnsembleJob::new(model, Start::Uniform, &config).unwrap();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    job.run_chunk(0..replicates, &pool)
        .replicates
        .iter()
        .map(|r| r.state_changes)
        .sum()
}

#[divan::bench(args = [2, 10])]
fn death_birth_dense(bencher: divan::Bencher, m: usize) {
    let model = model(m, 20, Rule::DeathBirth);
    bencher.bench(|| run_chunk(divan::black_box(&model), 200));
}

#[divan::bench(args = [2, 10])]
fn birth_death_dense(bencher: divan::Bencher, m: usize) {
    let model = model(m, 20, Rule::BirthDeath);
    bencher.bench(|| run_chunk(divan::black_box(&model), 200));
}

#[divan::bench(args = [2, 10])]
fn wright_fisher_dense(bencher: divan::Bencher, m: usize) {
    let model = model(m, 20, Rule::WrightFisher);
    bencher.bench(|| run_chunk(divan::black_box(&model), 200));
}
