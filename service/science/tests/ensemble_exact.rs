//! Ensembles against the exact chain (`exact::solve`) on structured populations: asymmetric
//! matrices, unequal sizes, all three rules and both scopes. Fixation probability and mean
//! conditional fixation time must agree within 4.5 standard errors (fixed seeds).

mod common;
use common::model;
use demefix_science::ensemble::{End, EnsembleConfig, EnsembleJob, Scheme};
use demefix_science::exact::{self, ExactConfig};
use demefix_science::{Model, Rule, Scope, Start};

fn mean_se(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

fn compare(name: &str, m: &Model, seed: u64, replicates: u64) {
    let exact = exact::solve(m, &ExactConfig::default()).unwrap();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .unwrap();
    for (deme, want) in exact.per_deme.iter().enumerate() {
        let config = EnsembleConfig {
            seed: seed + deme as u64,
            replicates,
            chunk_size: 4096,
            target_half_width: None,
            max_generations: 10_000_000,
            arrival_fractions: vec![],
            scheme: Scheme::Auto,
        };
        let job = EnsembleJob::new(m, Start::Deme(deme), &config).unwrap();
        let g = job.ticks_per_generation() as f64;
        let out = job.run_chunk(0..replicates, &pool).replicates;
        let fix: Vec<f64> = out
            .iter()
            .filter(|r| r.end == End::Fixed)
            .map(|r| r.time as f64 / g)
            .collect();
        let abs: Vec<f64> = out
            .iter()
            .filter(|r| r.end != End::Unresolved)
            .map(|r| r.time as f64 / g)
            .collect();
        assert_eq!(
            abs.len() as u64,
            replicates,
            "{name}: unresolved replicates"
        );
        let p = want.fixation_probability;
        let rho = fix.len() as f64 / replicates as f64;
        let se = (p * (1.0 - p) / replicates as f64).sqrt();
        assert!(
            (rho - p).abs() <= 4.5 * se,
            "{name} deme {deme}: fixation probability {rho} vs exact {p} (se {se})"
        );
        let (t, t_se) = mean_se(&fix);
        let want_t = want.mean_fixation_generations;
        assert!(
            (t - want_t).abs() <= 4.5 * t_se,
            "{name} deme {deme}: fixation time {t} vs exact {want_t} (se {t_se})"
        );
        let (a, a_se) = mean_se(&abs);
        let want_a = want.mean_absorption_generations;
        assert!(
            (a - want_a).abs() <= 4.5 * a_se,
            "{name} deme {deme}: absorption time {a} vs exact {want_a} (se {a_se})"
        );
    }
}

// Matrices of references.md §3 and §5.4 (islands (3,5) and (2,3,4)).
fn two() -> Vec<Vec<f64>> {
    vec![vec![0.7, 0.3], vec![0.1, 0.9]]
}

fn three() -> Vec<Vec<f64>> {
    vec![
        vec![0.5, 0.3, 0.2],
        vec![0.1, 0.6, 0.3],
        vec![0.25, 0.25, 0.5],
    ]
}

#[test]
fn death_birth_deme_scope_agrees_with_the_exact_chain() {
    let m = model(vec![3, 5], &two(), Rule::DeathBirth, Scope::Deme, 0.5);
    compare("DB deme (3,5)", &m, 100, 20_000);
}

#[test]
fn death_birth_neighbourhood_scope_agrees_with_the_exact_chain() {
    let m = model(
        vec![2, 3, 4],
        &three(),
        Rule::DeathBirth,
        Scope::Neighbourhood,
        0.5,
    );
    compare("DB neighbourhood (2,3,4)", &m, 200, 20_000);
}

#[test]
fn birth_death_agrees_with_the_exact_chain() {
    let m = model(vec![2, 3, 4], &three(), Rule::BirthDeath, Scope::Deme, 0.5);
    compare("BD (2,3,4)", &m, 300, 20_000);
}

#[test]
fn wright_fisher_deme_scope_agrees_with_the_exact_chain() {
    let m = model(vec![3, 5], &two(), Rule::WrightFisher, Scope::Deme, 0.5);
    compare("WF deme (3,5)", &m, 400, 20_000);
}

#[test]
fn wright_fisher_neighbourhood_scope_agrees_with_the_exact_chain() {
    let m = model(
        vec![2, 3, 4],
        &three(),
        Rule::WrightFisher,
        Scope::Neighbourhood,
        0.5,
    );
    compare("WF neighbourhood (2,3,4)", &m, 500, 20_000);
}

#[test]
fn asymmetric_four_deme_flows_agree_with_the_exact_chain() {
    // a one-way-biased cycle with a weak back flow and unequal sizes
    let f = vec![
        vec![0.6, 0.3, 0.0, 0.1],
        vec![0.05, 0.5, 0.45, 0.0],
        vec![0.0, 0.1, 0.4, 0.5],
        vec![0.35, 0.0, 0.05, 0.6],
    ];
    for (i, rule) in [Rule::DeathBirth, Rule::BirthDeath].into_iter().enumerate() {
        let m = model(vec![2, 3, 1, 4], &f, rule, Scope::Deme, 0.3);
        compare(
            &format!("4 demes {}", rule.as_str()),
            &m,
            600 + 10 * i as u64,
            20_000,
        );
    }
}
