//! Benchmarks of the exact method (`cargo bench -p demefix-science --bench exact`): island
//! chains of about 10^4 and 10^5 count vectors under each solver.

use demefix_science::exact::{self, ExactConfig, SolverChoice};
use demefix_science::{Model, Population, Rule, Scope, StochasticMatrix};

fn main() {
    divan::main();
}

/// Two demes keeping 90% of recruits at home, death-birth, `s = 0.01`.
fn two_islands(a: u64, b: u64) -> Model {
    let pop = Population::new(vec![a, b]).unwrap();
    let kernel = StochasticMatrix::from_weights(&[vec![0.9, 0.1], vec![0.1, 0.9]]).unwrap();
    Model::new(&pop, kernel, Rule::DeathBirth, Scope::Deme, 0.01).unwrap()
}

fn run(model: &Model, solver: SolverChoice) -> f64 {
    let config = ExactConfig {
        solver,
        ..ExactConfig::default()
    };
    exact::solve(model, &config).unwrap().per_deme[0].fixation_probability
}

/// 10^4 states (two demes of 99).
#[divan::bench(args = [SolverChoice::Direct, SolverChoice::Iterative])]
fn states_1e4(bencher: divan::Bencher, solver: SolverChoice) {
    let model = two_islands(99, 99);
    bencher.bench(|| run(divan::black_box(&model), solver));
}

/// About 10^5 states (two demes of 315 and 316), direct sparse LU.
#[divan::bench(sample_count = 3)]
fn states_1e5_direct(bencher: divan::Bencher) {
    let model = two_islands(315, 316);
    bencher.bench(|| run(divan::black_box(&model), SolverChoice::Direct));
}
