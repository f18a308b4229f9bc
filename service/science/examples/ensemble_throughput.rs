//! Throughput of the ensemble method: state-changing events per second per core (by wall
//! clock and by CPU time of the one-thread run), and the speed-up from one to two threads.
//!
//! `cargo run --release -p demefix-science --example ensemble_throughput`

use demefix_science::ensemble::{EnsembleConfig, EnsembleJob, Scheme};
use demefix_science::{Model, Population, Rule, Scope, Start, StochasticMatrix};
use fictional::{cpu_seconds, load_average};
use std::time::Instant;

mod fictional;

/// A small deterministic generator for the test matrices (not the simulation's streams).
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64 / (1u64 << 53) as f64) * 0.9 + 0.1
    }
}

fn dense(m: usize, rng: &mut Lcg) -> Vec<Vec<f64>> {
    (0..m)
        .map(|i| {
            (0..m)
                .map(|j| if i == j { m as f64 } else { rng.next() })
                .collect()
        })
        .collect()
}

fn sparse(m: usize, rng: &mut Lcg) -> Vec<Vec<f64>> {
    // about five nonzeros per row: self, both ring neighbours, two pseudo-random demes
    (0..m)
        .map(|i| {
            let mut row = vec![0.0; m];
            row[i] = 2.0;
            row[(i + 1) % m] = rng.next();
            row[(i + m - 1) % m] = rng.next();
            for _ in 0..2 {
                let j = (rng.next() * 1e9) as usize % m;
                row[j] += rng.next();
            }
            row
        })
        .collect()
}

fn pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("thread pool")
}

/// Runs `replicates` replicates on `threads` threads: (state changes, wall seconds, CPU
/// seconds).
fn measure(model: &Model, replicates: u64, threads: usize) -> (u128, f64, f64) {
    let config = EnsembleConfig {
        seed: 42,
        replicates,
        chunk_size: replicates,
        target_half_width: None,
        max_generations: u64::MAX / (1 << 24),
        arrival_fractions: vec![0.5, 1.0],
        scheme: Scheme::Auto,
    };
    let job = EnsembleJob::new(model, Start::Uniform, &config).expect("valid job");
    let pool = pool(threads);
    let (t0, c0) = (Instant::now(), cpu_seconds());
    let chunk = job.run_chunk(0..replicates, &pool);
    let secs = t0.elapsed().as_secs_f64();
    let cpu = cpu_seconds() - c0;
    let changes = chunk
        .replicates
        .iter()
        .map(|r| u128::from(r.state_changes))
        .sum();
    (changes, secs, cpu)
}

/// Demes, matrix kind, deme sizes, matrix rows, replicates.
type Case = (usize, &'static str, Vec<u64>, Vec<Vec<f64>>, u64);

fn main() {
    // arguments: deme counts to run (default all), `--div D` divides the replicate counts,
    // `--one` skips the two-thread run (for instruction counts under callgrind)
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut only: Vec<usize> = Vec::new();
    let (mut divisor, mut one_only) = (1u64, false);
    let mut it = args.iter();
    while let Some(a) = it.next() {
        match a.as_str() {
            "--div" => divisor = it.next().and_then(|d| d.parse().ok()).unwrap_or(1),
            "--one" => one_only = true,
            m => only.extend(m.parse::<usize>().ok()),
        }
    }
    let mut rng = Lcg(7);
    let cases: Vec<Case> = vec![
        (2, "dense", vec![100, 100], dense(2, &mut rng), 20000),
        (10, "dense", vec![20; 10], dense(10, &mut rng), 20000),
        (100, "dense", vec![10; 100], dense(100, &mut rng), 100),
        (1000, "sparse", vec![5; 1000], sparse(1000, &mut rng), 40),
    ];
    println!("load average at start: {}", load_average());
    println!(
        "| {:>5} | {:<6} | {:<11} | {:>12} | {:>14} | {:>13} | {:>12} |",
        "m", "matrix", "rule", "changes", "Mev/s per core", "Mev/CPU-s", "1->2 threads"
    );
    println!(
        "|------:|:-------|:------------|-------------:|---------------:|--------------:|-------------:|"
    );
    for (m, kind, sizes, rows, replicates) in &cases {
        if !only.is_empty() && !only.contains(m) {
            continue;
        }
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let pop = Population::new(sizes.clone()).expect("sizes");
            let kernel = StochasticMatrix::from_weights(rows).expect("matrix");
            let model = Model::new(&pop, kernel, rule, Scope::Deme, 0.2).expect("model");
            let replicates = (*replicates / divisor).max(1);
            let (changes, one, cpu) = measure(&model, replicates, 1);
            let speedup = if one_only {
                "-".to_string()
            } else {
                let (changes2, two, _) = measure(&model, replicates, 2);
                assert_eq!(changes, changes2, "results depend on the thread count");
                format!("{:.2}", one / two)
            };
            println!(
                "| {:>5} | {:<6} | {:<11} | {:>12} | {:>14.1} | {:>13.1} | {:>12} |",
                m,
                kind,
                rule.as_str(),
                changes,
                changes as f64 / one / 1e6,
                changes as f64 / cpu / 1e6,
                speedup
            );
        }
    }
    println!("load average at end: {}", load_average());
}
