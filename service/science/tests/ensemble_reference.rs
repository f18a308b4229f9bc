//! Ensembles against closed forms and published check values (references.md §1, §2, §4).
//! Every comparison allows 4.5 standard errors of the estimate, with fixed seeds.

mod common;
use common::{model, star};
use demefix_science::ensemble::{End, EnsembleConfig, EnsembleJob, Scheme};
use demefix_science::{Model, Rule, Scope, Start};

fn pool() -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .unwrap()
}

fn config(seed: u64, replicates: u64) -> EnsembleConfig {
    EnsembleConfig {
        seed,
        replicates,
        chunk_size: 4096,
        target_half_width: None,
        max_generations: 1_000_000,
        arrival_fractions: vec![],
        scheme: Scheme::Auto,
    }
}

/// Estimates from `replicates` replicates: (fixation probability, its standard error at the
/// reference value `p`, mean fixation time and its standard error, mean absorption time and
/// its standard error), times in generations.
struct Estimate {
    rho: f64,
    fix_mean: f64,
    fix_se: f64,
    abs_mean: f64,
    abs_se: f64,
    n: f64,
}

fn mean_se(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

fn estimate(model: &Model, start: Start, seed: u64, replicates: u64) -> Estimate {
    let job = EnsembleJob::new(model, start, &config(seed, replicates)).unwrap();
    let chunk = job.run_chunk(0..replicates, &pool());
    let g = job.ticks_per_generation() as f64;
    let fix: Vec<f64> = chunk
        .replicates
        .iter()
        .filter(|r| r.end == End::Fixed)
        .map(|r| r.time as f64 / g)
        .collect();
    let abs: Vec<f64> = chunk
        .replicates
        .iter()
        .filter(|r| r.end != End::Unresolved)
        .map(|r| r.time as f64 / g)
        .collect();
    assert_eq!(
        abs.len() as u64,
        replicates,
        "no replicate may stay unresolved"
    );
    let (fix_mean, fix_se) = mean_se(&fix);
    let (abs_mean, abs_se) = mean_se(&abs);
    Estimate {
        rho: fix.len() as f64 / replicates as f64,
        fix_mean,
        fix_se,
        abs_mean,
        abs_se,
        n: replicates as f64,
    }
}

fn assert_rho(e: &Estimate, want: f64, what: &str) {
    let se = (want * (1.0 - want) / e.n).sqrt();
    assert!(
        (e.rho - want).abs() <= 4.5 * se,
        "{what}: fixation probability {} vs {want} (se {se})",
        e.rho
    );
}

fn assert_time(got: f64, se: f64, want: f64, what: &str) {
    assert!(
        (got - want).abs() <= 4.5 * se,
        "{what}: time {got} vs {want} (se {se})"
    );
}

#[test]
fn one_deme_moran_matches_the_moran_fixation_probability_and_times() {
    // Moran P.A.P. (1958) Math. Proc. Camb. Phil. Soc. 54(1):60-71 (from memory); check values
    // and times (Moran steps; / N for generations) from references.md §1.1-1.2, computed by
    // exact linear solve. Times: Antal & Scheuring (2006) Bull. Math. Biol. 68:1923-1944
    // (formulas from memory).
    let cases = [
        // (r, rho, unconditional t_1 steps, conditional fixation steps)
        (2.0, 0.500488758553, 34.88018433, 60.26938742),
        (1.1, 0.147950358984, 30.58253088, 88.84410332),
    ];
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        for (seed, (r, rho, t_abs, t_fix)) in cases.into_iter().enumerate() {
            let m = model(vec![10], &[vec![1.0]], rule, Scope::Deme, r - 1.0);
            let e = estimate(&m, Start::Deme(0), 10 + seed as u64, 20_000);
            let what = format!("{} r={r}", rule.as_str());
            assert_rho(&e, rho, &what);
            assert_time(e.abs_mean, e.abs_se, t_abs / 10.0, &what);
            assert_time(e.fix_mean, e.fix_se, t_fix / 10.0, &what);
        }
    }
}

#[test]
fn neutral_conditional_fixation_takes_n_minus_one_generations() {
    // Neutral Moran: conditional fixation time N(N-1) steps = N - 1 generations, unconditional
    // absorption N H_{N-1} steps; Ewens W.J. (2004) Mathematical Population Genetics I
    // (from memory), references.md §1.2.
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let n = 20u64;
        let m = model(vec![n], &[vec![1.0]], rule, Scope::Deme, 0.0);
        let e = estimate(&m, Start::Deme(0), 3, 40_000);
        assert_rho(&e, 1.0 / n as f64, rule.as_str());
        assert_time(e.fix_mean, e.fix_se, (n - 1) as f64, rule.as_str());
        let harmonic: f64 = (1..n).map(|j| 1.0 / j as f64).sum();
        assert_time(e.abs_mean, e.abs_se, harmonic, rule.as_str());
    }
}

#[test]
fn haploid_wright_fisher_matches_the_exact_chain_values() {
    // Haploid Wright-Fisher chain p' = r i / (r i + N - i), i' ~ Bin(N, p'); exact values in
    // references.md §2.1 (computed by the maintainers; diffusion form after Kimura M. (1962)
    // Genetics 47:713-719).
    let m = model(vec![10], &[vec![1.0]], Rule::WrightFisher, Scope::Deme, 0.1);
    let e = estimate(&m, Start::Deme(0), 5, 40_000);
    assert_rho(&e, 0.2045854730, "WF N=10 s=0.1");
    assert_time(e.abs_mean, e.abs_se, 6.701062, "WF N=10 s=0.1 absorption");
    assert_time(e.fix_mean, e.fix_se, 16.639255, "WF N=10 s=0.1 fixation");
    let m = model(
        vec![100],
        &[vec![1.0]],
        Rule::WrightFisher,
        Scope::Deme,
        0.01,
    );
    let e = estimate(&m, Start::Deme(0), 6, 40_000);
    assert_rho(&e, 0.0228351259, "WF N=100 s=0.01");
    assert_time(
        e.abs_mean,
        e.abs_se,
        12.275984,
        "WF N=100 s=0.01 absorption",
    );
    assert_time(e.fix_mean, e.fix_se, 186.747389, "WF N=100 s=0.01 fixation");
}

#[test]
fn star_graph_birth_death_matches_the_exact_star_formula() {
    // Exact star, BD: Broom M. & Rychtar J. (2008) Proc. R. Soc. A 464(2098):2609-2627 (form
    // from memory); closed form and values in references.md §4.2 (n = 5 leaves, r = 2).
    let (p_leaf, p_centre, uniform, temperature) = (
        0.683569738814,
        0.214836203627,
        0.605447482950,
        0.292958459492,
    );
    let m = model(vec![1; 6], &star(5), Rule::BirthDeath, Scope::Deme, 1.0);
    for (seed, (start, want)) in [
        (Start::Deme(1), p_leaf),
        (Start::Deme(0), p_centre),
        (Start::Uniform, uniform),
        (Start::AtBirth, temperature),
    ]
    .into_iter()
    .enumerate()
    {
        let e = estimate(&m, start, 20 + seed as u64, 20_000);
        assert_rho(&e, want, &format!("BD star {start:?}"));
    }
    // times from a leaf / the centre at r = 2 (steps): 60.96704768 / 19.16107213 absorption,
    // 80.37467562 / 78.19285744 conditional fixation (references.md §4.2)
    let e = estimate(&m, Start::Deme(1), 30, 20_000);
    assert_time(
        e.abs_mean,
        e.abs_se,
        60.96704768 / 6.0,
        "BD star leaf absorption",
    );
    assert_time(
        e.fix_mean,
        e.fix_se,
        80.37467562 / 6.0,
        "BD star leaf fixation",
    );
    let e = estimate(&m, Start::Deme(0), 31, 20_000);
    assert_time(
        e.abs_mean,
        e.abs_se,
        19.16107213 / 6.0,
        "BD star centre absorption",
    );
    assert_time(
        e.fix_mean,
        e.fix_se,
        78.19285744 / 6.0,
        "BD star centre fixation",
    );
}

#[test]
fn star_graph_death_birth_matches_the_exact_star_formula() {
    // Exact star, DB (parent chosen among neighbours in proportion to fitness, i.e.
    // neighbourhood scope with all sizes 1): references.md §4.3 [derived, verified], cf.
    // Hadjichrysanthou C., Broom M., Rychtar J. (2011) Dyn. Games Appl. 1:386-407 (from
    // memory). n = 5 leaves, r = 2: P_L = 11/60, P_C = 11/18, uniform 0.254629629630.
    let m = model(
        vec![1; 6],
        &star(5),
        Rule::DeathBirth,
        Scope::Neighbourhood,
        1.0,
    );
    for (seed, (start, want)) in [
        (Start::Deme(1), 11.0 / 60.0),
        (Start::Deme(0), 11.0 / 18.0),
        (Start::Uniform, 0.254629629630),
    ]
    .into_iter()
    .enumerate()
    {
        let e = estimate(&m, start, 40 + seed as u64, 20_000);
        assert_rho(&e, want, &format!("DB star {start:?}"));
    }
    // absorption from the centre is n H_n = 11.41666667 steps for every r (references.md §4.3)
    let e = estimate(&m, Start::Deme(0), 50, 20_000);
    assert_time(
        e.abs_mean,
        e.abs_se,
        11.41666667 / 6.0,
        "DB star centre absorption",
    );
}
