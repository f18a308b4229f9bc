//! Wall time, solver, residual and peak memory of the exact method on growing chains.
//!
//! `cargo run --release -p demefix-science --example exact_scaling` runs every case in its own
//! child process (so that each peak RSS is its own); `... -- CASE [direct|iterative]` runs one.
//! With `--sensitivity` anywhere, each case also computes the kernel gradients of the
//! uniform-start answers (`exact::sensitivity`: the forward systems plus two adjoint solves).

use demefix_science::exact::{self, ExactConfig, SolverChoice};
use demefix_science::sensitivity::rank_by_effect;
use demefix_science::{Model, Population, Rule, Scope, Start, StochasticMatrix};
use std::process::Command;
use std::time::Instant;

/// Island model: `sizes`, recruitment matrix keeping `stay` at home and sharing the rest
/// unevenly among the other demes.
fn islands(sizes: &[u64], stay: f64, rule: Rule, s: f64) -> Model {
    let m = sizes.len();
    let rows: Vec<Vec<f64>> = (0..m)
        .map(|i| {
            let weights: Vec<f64> = (0..m)
                .map(|j| {
                    if i == j {
                        0.0
                    } else {
                        (1 + (i + 2 * j) % 3) as f64
                    }
                })
                .collect();
            let total: f64 = weights.iter().sum();
            (0..m)
                .map(|j| {
                    if i == j {
                        stay
                    } else {
                        (1.0 - stay) * weights[j] / total
                    }
                })
                .collect()
        })
        .collect();
    let pop = Population::new(sizes.to_vec()).unwrap();
    Model::new(
        &pop,
        StochasticMatrix::from_weights(&rows).unwrap(),
        rule,
        Scope::Deme,
        s,
    )
    .unwrap()
}

/// An `n`-node cycle with chords `i -- i + chord` (every node degree 4), one individual per
/// node, death-birth with neighbourhood scope: 2^n states.
fn chorded_cycle(n: usize, chord: usize) -> Model {
    let rows: Vec<Vec<f64>> = (0..n)
        .map(|i| {
            (0..n)
                .map(|j| {
                    let d = (i + n - j) % n;
                    if [1, chord, n - 1, n - chord].contains(&d) {
                        1.0
                    } else {
                        0.0
                    }
                })
                .collect()
        })
        .collect();
    let pop = Population::new(vec![1; n]).unwrap();
    let b = StochasticMatrix::from_weights(&rows).unwrap();
    Model::new(&pop, b, Rule::DeathBirth, Scope::Neighbourhood, 0.1).unwrap()
}

fn case(name: &str) -> Option<Model> {
    Some(match name {
        "islands_1e4" => islands(&[99, 99], 0.9, Rule::DeathBirth, 0.01),
        "islands_1e5_two_demes" => islands(&[315, 316], 0.9, Rule::DeathBirth, 0.01),
        "islands_1e5" => islands(&[45, 46, 47], 0.9, Rule::DeathBirth, 0.01),
        "islands_1e5_birth_death" => islands(&[45, 46, 47], 0.9, Rule::BirthDeath, 0.01),
        "islands_1e6" => islands(&[99, 99, 99], 0.9, Rule::DeathBirth, 0.01),
        "islands_1e6_birth_death" => islands(&[99, 99, 99], 0.9, Rule::BirthDeath, 0.01),
        "graph_2e13" => chorded_cycle(13, 5),
        "graph_2e17" => chorded_cycle(17, 6),
        "graph_2e20" => chorded_cycle(20, 7),
        _ => return None,
    })
}

const CASES: [&str; 9] = [
    "islands_1e4",
    "islands_1e5_two_demes",
    "islands_1e5",
    "islands_1e5_birth_death",
    "islands_1e6",
    "islands_1e6_birth_death",
    "graph_2e13",
    "graph_2e17",
    "graph_2e20",
];

fn peak_rss_mib() -> f64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<f64>().ok())
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

fn run_sensitivity(name: &str, solver: SolverChoice) {
    let model = case(name).expect("unknown case");
    let config = ExactConfig {
        solver,
        ..ExactConfig::default()
    };
    let weights = Start::Uniform.deme_weights(&model);
    let started = Instant::now();
    let got = exact::sensitivity(&model, &config, &weights);
    let seconds = started.elapsed().as_secs_f64();
    match got {
        Ok(sens) => {
            let links = rank_by_effect(sens.d_fixation_probability.link_effects(model.rule()));
            let top = links.first().map_or(f64::NAN, |l| l.derivative);
            println!(
                "{name:<24} sensitivity states {:>8} {:<16} iters {:?} residual {:.1e} time {seconds:>7.2} s peak RSS {:>7.0} MiB  links {} largest effect {top:.6e}",
                sens.report.states,
                sens.report.solver,
                sens.report.iterations,
                sens.report.relative_residual,
                peak_rss_mib(),
                links.len(),
            );
        }
        Err(e) => println!("{name:<24} sensitivity failed after {seconds:.2} s: {e}"),
    }
}

fn run(name: &str, solver: SolverChoice) {
    let model = case(name).expect("unknown case");
    let mut config = ExactConfig {
        solver,
        ..ExactConfig::default()
    };
    if let Some(tolerance) = std::env::args().nth(3).and_then(|t| t.parse().ok()) {
        config.tolerance = tolerance;
    }
    let started = Instant::now();
    let solution = exact::solve(&model, &config);
    let seconds = started.elapsed().as_secs_f64();
    match solution {
        Ok(sol) => {
            let r = &sol.report;
            println!(
                "{name:<24} states {:>8} nnz {:>9} {:<16} iters {:>6} residual {:.1e} time {seconds:>7.2} s peak RSS {:>7.0} MiB  rho[0] {:.12e} T_fix[0] {:.10e}",
                r.states,
                r.nonzeros,
                r.solver,
                r.iterations.map_or("-".to_string(), |i| i.to_string()),
                r.relative_residual,
                peak_rss_mib(),
                sol.per_deme[0].fixation_probability,
                sol.per_deme[0].mean_fixation_generations,
            );
        }
        Err(e) => println!("{name:<24} failed after {seconds:.2} s: {e}"),
    }
}

fn main() {
    let all: Vec<String> = std::env::args().skip(1).collect();
    let sensitivity = all.iter().any(|a| a == "--sensitivity");
    let args: Vec<String> = all.into_iter().filter(|a| a != "--sensitivity").collect();
    let solver = match args.get(1).map(String::as_str) {
        Some("direct") => SolverChoice::Direct,
        Some("iterative") => SolverChoice::Iterative,
        _ => SolverChoice::Auto,
    };
    if let Some(name) = args.first() {
        if sensitivity {
            run_sensitivity(name, solver);
        } else {
            run(name, solver);
        }
        return;
    }
    let exe = std::env::current_exe().expect("own path");
    for name in CASES {
        let mut command = Command::new(&exe);
        command.arg(name);
        if sensitivity {
            command.args(["auto", "--sensitivity"]);
        }
        let status = command.status().expect("child runs");
        if !status.success() {
            println!("{name:<24} child process failed: {status}");
        }
    }
}
