//! Ensembles at real sizes, on fictional populations: deme sizes spread log-uniformly, a
//! sparse asymmetric flow matrix of our own generation (every deme sends to the next one on
//! a ring and to 3 to 5 others, random weights, 2% of each deme's recruitment from elsewhere;
//! seeded, so every run builds the same population).
//!
//! Modes (wall time, replicates per second and fixed count are printed; the CPU time of the
//! process is printed too, since the machine may be shared):
//!
//! * `cargo run --release -p demefix-science --example ensemble_scale -- wf [replicates]`
//!   (the default mode): 100 demes of 10^3 to 10^6, s = 0.02, Wright-Fisher, arrival
//!   fractions [0.05, 0.5], 10^5 replicates on a 2-thread pool.
//! * `... -- large death_birth|birth_death [replicates] [event|generation|auto]`: the same
//!   100-deme population under an event rule (default: the generation scheme).
//! * `... -- compare [replicates] [case]`: the generation scheme against the event scheme
//!   where both run (demes of 10^3 to 10^4, several s and matrices, both event rules; `case`
//!   1 to 6 runs one of them), with the same seed for both, so replicate `q` of the two runs
//!   shares its stream until the first handover. Prints fixation probabilities and mean
//!   fixation times with standard errors, the paired change of the fixation probability
//!   (replicates whose fate differs) and of the fixation time over replicates that fixed
//!   under both.
//! * `... -- moran [replicates]`: one well-mixed deme of 2*10^4 to 10^6 (both event rules are
//!   the Moran process there) under the generation scheme, against the exact fixation
//!   probability and conditional fixation time.

mod fictional;

use demefix_science::ensemble::{End, EnsembleConfig, EnsembleJob, ReplicateOutcome, Scheme};
use demefix_science::{
    MigrationInput, Model, Orientation, Population, Rule, Scope, SelfFlows, Start,
};
use fictional::{cpu_seconds, load_average, population};
use std::time::Instant;

fn pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("thread pool")
}

/// Runs `replicates` replicates from a uniform start; prints one line and returns the
/// outcomes and the job's method name.
fn run(
    model: &Model,
    replicates: u64,
    scheme: Scheme,
    seed: u64,
    fractions: Vec<f64>,
) -> (Vec<ReplicateOutcome>, &'static str, u64) {
    let config = EnsembleConfig {
        seed,
        replicates,
        chunk_size: 1000,
        target_half_width: None,
        max_generations: 10_000_000,
        arrival_fractions: fractions,
        scheme,
    };
    let job = EnsembleJob::new(model, Start::Uniform, &config).expect("valid job");
    let pool = pool(2);
    let (t0, c0) = (Instant::now(), cpu_seconds());
    let mut out = Vec::new();
    let mut next = 0;
    while next < replicates {
        let end = (next + 1000).min(replicates);
        out.extend(job.run_chunk(next..end, &pool).replicates);
        next = end;
    }
    let (secs, cpu) = (t0.elapsed().as_secs_f64(), cpu_seconds() - c0);
    let fixed = out.iter().filter(|r| r.end == End::Fixed).count();
    let unresolved = out.iter().filter(|r| r.end == End::Unresolved).count();
    let changes: u64 = out.iter().map(|r| r.state_changes).sum();
    println!(
        "{} {}: {replicates} replicates in {secs:.1} s wall, {cpu:.1} s CPU ({:.0} replicates/s), \
         fixed {fixed}, unresolved {unresolved}, state changes {changes}",
        model.rule().as_str(),
        job.method(),
        replicates as f64 / secs,
    );
    (out, job.method(), job.ticks_per_generation())
}

fn mean_se(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    if x.len() < 2 {
        return (x.first().copied().unwrap_or(f64::NAN), f64::NAN);
    }
    let mean = x.iter().sum::<f64>() / n;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

fn fixation_times(out: &[ReplicateOutcome], g: u64) -> Vec<f64> {
    out.iter()
        .filter(|r| r.end == End::Fixed)
        .map(|r| r.time as f64 / g as f64)
        .collect()
}

/// The 100-deme scenario under `rule`.
fn scenario(rule: Rule, replicates: u64, scheme: Scheme) {
    let model = population(100, (3.0, 6.0), 0.98, rule, 0.02, 2026);
    println!(
        "100 demes, sizes {}..{}, N = {}, {} nonzeros, s = 0.02, load average {}",
        model.sizes().iter().min().unwrap(),
        model.sizes().iter().max().unwrap(),
        model.total(),
        model.kernel().nnz(),
        load_average()
    );
    let (out, _, g) = run(&model, replicates, scheme, 7, vec![0.05, 0.5]);
    let (t, se) = mean_se(&fixation_times(&out, g));
    println!("mean fixation time {t:.1} generations (se {se:.1})");
}

/// The generation scheme against the event scheme on moderate sizes.
fn compare(replicates: u64, only: Option<usize>) {
    // (demes, size exponents, retention, s)
    let cases = [
        (2, (3.4, 3.7), 0.99, 0.05),
        (5, (3.0, 4.0), 0.98, 0.02),
        (5, (3.0, 4.0), 0.9, 0.05),
        (4, (3.3, 3.7), 0.5, 0.02),
        (8, (3.0, 3.7), 0.95, 0.01),
        (3, (3.3, 3.6), 0.95, 0.002),
    ];
    println!("load average {}", load_average());
    println!(
        "| rule | demes | sizes | retention | s | rho event | rho generation | paired change | \
         fixation time event | generation | paired change (both fixed) |"
    );
    println!("|---|---|---|---|---|---|---|---|---|---|---|");
    for (seed, &(m, exps, retention, s)) in cases.iter().enumerate() {
        if only.is_some_and(|case| case != seed + 1) {
            continue;
        }
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let model = population(m, exps, retention, rule, s, 100 + seed as u64);
            let (ev, _, g) = run(&model, replicates, Scheme::Event, 11 + seed as u64, vec![]);
            let (gen, _, _) = run(
                &model,
                replicates,
                Scheme::Generation,
                11 + seed as u64,
                vec![],
            );
            let rho = |o: &[ReplicateOutcome]| {
                let p = o.iter().filter(|r| r.end == End::Fixed).count() as f64 / o.len() as f64;
                (p, (p * (1.0 - p) / o.len() as f64).sqrt())
            };
            let ((pe, pe_se), (pg, pg_se)) = (rho(&ev), rho(&gen));
            let (te, te_se) = mean_se(&fixation_times(&ev, g));
            let (tg, tg_se) = mean_se(&fixation_times(&gen, g));
            let paired: Vec<f64> = ev
                .iter()
                .zip(&gen)
                .filter(|(a, b)| a.end == End::Fixed && b.end == End::Fixed)
                .map(|(a, b)| (b.time as f64 - a.time as f64) / g as f64)
                .collect();
            let (d, d_se) = mean_se(&paired);
            let fixed = |r: &ReplicateOutcome| f64::from(u8::from(r.end == End::Fixed));
            let moved: Vec<f64> = ev
                .iter()
                .zip(&gen)
                .map(|(a, b)| fixed(b) - fixed(a))
                .collect();
            let (dp, dp_se) = mean_se(&moved);
            println!(
                "| {} | {m} | {}..{} | {retention} | {s} | {pe:.4} ± {pe_se:.4} | \
                 {pg:.4} ± {pg_se:.4} | {dp:+.4} ± {dp_se:.4} | {te:.1} ± {te_se:.1} | \
                 {tg:.1} ± {tg_se:.1} | \
                 {d:+.2} ± {d_se:.2} ({:+.2}%, n = {}) |",
                rule.as_str(),
                model.sizes().iter().min().unwrap(),
                model.sizes().iter().max().unwrap(),
                100.0 * d / te,
                paired.len()
            );
        }
    }
}

/// Exact conditional fixation time (generations) and fixation probability of one variant in
/// a well-mixed Moran population of `n` at fitness `r` (references.md §1.2: Antal &
/// Scheuring 2006, Bull. Math. Biol. 68:1923-1944, formulas from memory), by the recurrence
/// `S_k = gamma S_{k-1} + phi_k / T_k^+` of the inner sum, `O(n)`.
fn moran_exact(n: u64, r: f64) -> (f64, f64) {
    let nf = n as f64;
    let phi = |l: f64| (1.0 - r.powf(-l)) / (1.0 - r.powf(-nf));
    let (mut inner, mut steps) = (0.0, 0.0);
    for k in 1..n {
        let k = k as f64;
        let up = r * k * (nf - k) / (nf * (r * k + nf - k));
        inner = inner / r + phi(k) / up;
        steps += inner;
    }
    (steps / nf, phi(1.0))
}

/// One well-mixed deme (both event rules are the Moran process there): the generation
/// scheme against the exact fixation probability and conditional fixation time.
fn moran(replicates: u64) {
    println!("load average {}", load_average());
    println!(
        "| rule | N | s | rho exact | rho generation | fixation time exact | generation | change |"
    );
    println!("|---|---|---|---|---|---|---|---|");
    for (i, &(n, s)) in [
        (20_000u64, 0.05),
        (100_000, 0.02),
        (100_000, 0.05),
        (1_000_000, 0.1),
    ]
    .iter()
    .enumerate()
    {
        let (t_exact, rho_exact) = moran_exact(n, 1.0 + s);
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            let pop = Population::new(vec![n]).expect("size");
            let input = MigrationInput {
                orientation: Orientation::Recruitment,
                rows: vec![vec![1.0]],
                self_flows: SelfFlows::Keep,
            };
            let model = Model::from_input(&pop, &input, rule, Scope::Deme, s).expect("model");
            let (out, _, g) = run(
                &model,
                replicates,
                Scheme::Generation,
                30 + i as u64,
                vec![],
            );
            let fixed = fixation_times(&out, g);
            let p = fixed.len() as f64 / out.len() as f64;
            let p_se = (rho_exact * (1.0 - rho_exact) / out.len() as f64).sqrt();
            let (t, t_se) = mean_se(&fixed);
            println!(
                "| {} | {n} | {s} | {rho_exact:.5} | {p:.5} ± {p_se:.5} | {t_exact:.2} | \
                 {t:.2} ± {t_se:.2} | {:+.2}% ± {:.2}% |",
                rule.as_str(),
                100.0 * (t / t_exact - 1.0),
                100.0 * t_se / t_exact
            );
        }
    }
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let number = |i: usize, default: u64| {
        args.get(i)
            .and_then(|x| x.parse::<u64>().ok())
            .unwrap_or(default)
    };
    match args.first().map(String::as_str) {
        None | Some("wf") => scenario(Rule::WrightFisher, number(1, 100_000), Scheme::Auto),
        Some("large") => {
            let rule = match args.get(1).map(String::as_str) {
                Some("birth_death") => Rule::BirthDeath,
                _ => Rule::DeathBirth,
            };
            let scheme = match args.get(3).map(String::as_str) {
                Some("event") => Scheme::Event,
                Some("auto") => Scheme::Auto,
                _ => Scheme::Generation,
            };
            scenario(rule, number(2, 1000), scheme);
        }
        Some("compare") => compare(number(1, 20_000), args.get(2).and_then(|x| x.parse().ok())),
        Some("moran") => moran(number(1, 20_000)),
        Some(other) => eprintln!("unknown mode {other}: use wf, large, compare or moran"),
    }
}
