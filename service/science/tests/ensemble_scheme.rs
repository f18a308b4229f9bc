//! The stepping schemes of the ensembles: what `auto` resolves to, the generation scheme of
//! death-birth and birth-death against the event scheme (within its documented error) and
//! against large-population limits, bit-identical results for any thread count and chunk
//! size, checkpoints that do not cross schemes, and deme sizes up to 10^8.
//!
//! Statistical checks use fixed seeds and 4.5 standard errors.

mod common;
use common::model;
use demefix_science::ensemble::chain::LEAP_FROM_COPIES;
use demefix_science::ensemble::scheme::AUTO_GENERATION_FROM_TOTAL;
use demefix_science::ensemble::{
    run, run_resumable, Accumulator, End, EnsembleConfig, EnsembleError, EnsembleJob, NoProgress,
    ReplicateOutcome, Scheme, Stepping,
};
use demefix_science::{Model, Rule, Scope, Start};
use std::sync::atomic::AtomicBool;

fn pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
}

fn config(seed: u64, replicates: u64, scheme: Scheme) -> EnsembleConfig {
    EnsembleConfig {
        seed,
        replicates,
        chunk_size: 1000,
        max_generations: 1_000_000,
        arrival_fractions: vec![0.05, 0.5, 1.0],
        scheme,
        ..EnsembleConfig::default()
    }
}

fn outcomes(m: &Model, start: Start, cfg: &EnsembleConfig) -> Vec<ReplicateOutcome> {
    let job = EnsembleJob::new(m, start, cfg).unwrap();
    job.run_chunk(0..cfg.replicates, &pool(2)).replicates
}

fn mean_se(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

/// (fixation probability, its standard error, fixation times in generations, total state
/// changes).
fn estimate(m: &Model, cfg: &EnsembleConfig) -> (f64, f64, Vec<f64>, u64) {
    let out = outcomes(m, Start::Uniform, cfg);
    assert!(out.iter().all(|r| r.end != End::Unresolved));
    let g = m.total() as f64;
    let times: Vec<f64> = out
        .iter()
        .filter(|r| r.end == End::Fixed)
        .map(|r| r.time as f64 / g)
        .collect();
    let p = times.len() as f64 / out.len() as f64;
    let changes = out.iter().map(|r| r.state_changes).sum();
    (p, (p * (1.0 - p) / out.len() as f64).sqrt(), times, changes)
}

/// Two demes large enough for the generation scheme to leap (2.5 and 4 times
/// `LEAP_FROM_COPIES`), small enough for the event scheme to run in seconds.
fn two_large_demes(rule: Rule, s: f64) -> Model {
    let rows = vec![vec![0.99, 0.01], vec![0.02, 0.98]];
    model(
        vec![5 * LEAP_FROM_COPIES / 2, 4 * LEAP_FROM_COPIES],
        &rows,
        rule,
        Scope::Deme,
        s,
    )
}

#[test]
fn auto_takes_the_generation_scheme_from_the_documented_total_size() {
    let rows = vec![vec![0.9, 0.1], vec![0.1, 0.9]];
    let half = AUTO_GENERATION_FROM_TOTAL / 2;
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let below = model(vec![half - 1, half], &rows, rule, Scope::Deme, 0.1);
        let at = model(vec![half, half], &rows, rule, Scope::Deme, 0.1);
        assert_eq!(Scheme::Auto.resolve(&below), Stepping::Event);
        assert_eq!(Scheme::Auto.resolve(&at), Stepping::Generation);
        assert_eq!(Scheme::Event.resolve(&at), Stepping::Event);
        assert_eq!(Scheme::Generation.resolve(&below), Stepping::Generation);
        assert!(Stepping::Generation.known_bias(rule).is_some());
        assert_eq!(Stepping::Event.known_bias(rule), None);
    }
    // Wright-Fisher has no events: every scheme steps it by its own, exact generations
    let wf = model(vec![3, 5], &rows, Rule::WrightFisher, Scope::Deme, 0.1);
    for scheme in [Scheme::Auto, Scheme::Event, Scheme::Generation] {
        assert_eq!(scheme.resolve(&wf), Stepping::Generation);
    }
    assert_eq!(Stepping::Generation.known_bias(Rule::WrightFisher), None);
    assert_eq!(Stepping::Event.method(), "ensemble:event");
    assert_eq!(Stepping::Generation.method(), "ensemble:generation");
    let job = EnsembleJob::new(&wf, Start::Uniform, &config(1, 10, Scheme::Event)).unwrap();
    assert_eq!(job.method(), "ensemble:generation");
    assert_eq!(job.known_bias(), None);
}

#[test]
fn below_the_handover_size_the_generation_scheme_is_the_event_scheme() {
    // No deme can hold LEAP_FROM_COPIES of both types, so the generation scheme never
    // leaves the event chain: same streams, same draws, the same outcomes bit for bit.
    let n = 2 * LEAP_FROM_COPIES - 1;
    let rows = vec![
        vec![0.8, 0.2, 0.0],
        vec![0.0, 0.9, 0.1],
        vec![0.3, 0.0, 0.7],
    ];
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let m = model(vec![n, n / 2, 40], &rows, rule, Scope::Deme, 0.05);
        let event = outcomes(&m, Start::Uniform, &config(3, 300, Scheme::Event));
        let generation = outcomes(&m, Start::Uniform, &config(3, 300, Scheme::Generation));
        assert_eq!(event, generation, "{rule:?}");
        assert!(event.iter().any(|r| r.end == End::Fixed), "{rule:?}");
    }
}

#[test]
fn the_generation_scheme_agrees_with_the_event_scheme_within_its_documented_error() {
    // Documented error (chain/leap.rs, measured with the ensemble_scale example): mean
    // fixation times within about 1%, fixation probabilities within sampling error. The
    // allowance here is that 1% plus 4.5 standard errors of the difference of two
    // independent ensembles (different seeds).
    for (i, rule) in [Rule::DeathBirth, Rule::BirthDeath].into_iter().enumerate() {
        let m = two_large_demes(rule, 0.05);
        let seed = 40 + 2 * i as u64;
        let (pe, pe_se, te, ce) = estimate(&m, &config(seed, 2500, Scheme::Event));
        let (pg, pg_se, tg, cg) = estimate(&m, &config(seed + 1, 2500, Scheme::Generation));
        // the generation scheme did leap: far fewer state changes
        assert!(3 * cg < 2 * ce, "{rule:?}: {cg} vs {ce} state changes");
        let se = (pe_se * pe_se + pg_se * pg_se).sqrt();
        assert!(
            (pg - pe).abs() <= 4.5 * se,
            "{rule:?}: fixation probability {pg} vs {pe} (se {se})"
        );
        let ((te, te_se), (tg, tg_se)) = (mean_se(&te), mean_se(&tg));
        let se = (te_se * te_se + tg_se * tg_se).sqrt();
        assert!(
            (tg - te).abs() <= 0.01 * te + 4.5 * se,
            "{rule:?}: mean fixation time {tg} vs {te} (se {se})"
        );
    }
}

#[test]
fn generation_scheme_results_are_bit_identical_for_any_thread_count_and_chunk_size() {
    let rows = vec![
        vec![0.97, 0.03, 0.0],
        vec![0.0, 0.98, 0.02],
        vec![0.05, 0.0, 0.95],
    ];
    let sizes = vec![3 * LEAP_FROM_COPIES, 2 * LEAP_FROM_COPIES, 300];
    for (rule, scope) in [
        (Rule::DeathBirth, Scope::Deme),
        (Rule::DeathBirth, Scope::Neighbourhood),
        (Rule::BirthDeath, Scope::Deme),
    ] {
        let m = model(sizes.clone(), &rows, rule, scope, 0.2);
        let cfg = |chunk| EnsembleConfig {
            chunk_size: chunk,
            ..config(9, 400, Scheme::Generation)
        };
        let summary = |threads, chunk| {
            let got = run(
                &m,
                Start::Uniform,
                &cfg(chunk),
                &pool(threads),
                &NoProgress,
                &AtomicBool::new(false),
            );
            format!("{got:?}")
        };
        let reference = summary(1, 400);
        assert!(reference.contains("fixed: "), "{reference}");
        for (threads, chunk) in [(2, 400), (1, 37), (2, 37)] {
            assert_eq!(summary(threads, chunk), reference, "{rule:?} {scope:?}");
        }
        // and it did leap: fewer state changes than the event scheme on the same streams
        let job = |scheme| EnsembleJob::new(&m, Start::Uniform, &config(9, 400, scheme)).unwrap();
        let changes = |scheme| -> u64 {
            job(scheme)
                .run_chunk(0..400, &pool(2))
                .replicates
                .iter()
                .map(|r| r.state_changes)
                .sum()
        };
        assert!(
            changes(Scheme::Generation) < changes(Scheme::Event),
            "{rule:?}"
        );
    }
}

#[test]
fn a_checkpoint_does_not_cross_schemes() {
    let m = two_large_demes(Rule::DeathBirth, 0.1);
    let mut checkpoint: Option<Accumulator> = None;
    let cancel = AtomicBool::new(false);
    run_resumable(
        &m,
        Start::Uniform,
        &config(5, 20, Scheme::Event),
        &pool(1),
        &NoProgress,
        &cancel,
        None,
        &mut |acc, _| checkpoint = Some(acc.clone()),
    )
    .unwrap();
    let acc = checkpoint.unwrap();
    let resume = |scheme| {
        run_resumable(
            &m,
            Start::Uniform,
            &config(5, 20, scheme),
            &pool(1),
            &NoProgress,
            &AtomicBool::new(false),
            Some(acc.clone()),
            &mut |_, _| {},
        )
    };
    // `auto` resolves to the event scheme at this size: the same results, so it resumes
    assert!(resume(Scheme::Auto).is_ok());
    assert_eq!(
        resume(Scheme::Generation).unwrap_err(),
        EnsembleError::ForeignCheckpoint
    );
}

#[test]
fn one_deme_of_a_hundred_million_meets_the_large_population_limits() {
    // Large-N limits of a single deme from references.md §2.2 (computed by the maintainers):
    // Moran (death-birth and birth-death) rho -> 1 - 1/r; haploid Wright-Fisher rho -> the
    // survival probability of a Poisson(r) Galton-Watson process, 0.17613414363181 at
    // s = 0.1 (Haldane's 2s to first order). Finite-N corrections at N = 10^8 are below
    // 1e-6. The event rules run on the generation scheme (they leap from 1,000 copies).
    let n = 100_000_000;
    let s = 0.1;
    let cases = [
        (Rule::DeathBirth, s / (1.0 + s)),
        (Rule::BirthDeath, s / (1.0 + s)),
        (Rule::WrightFisher, 0.17613414363181),
    ];
    for (i, (rule, want)) in cases.into_iter().enumerate() {
        let m = model(vec![n], &[vec![1.0]], rule, Scope::Deme, s);
        let cfg = config(60 + i as u64, 4000, Scheme::Auto);
        let job = EnsembleJob::new(&m, Start::Uniform, &cfg).unwrap();
        assert_eq!(job.stepping(), Stepping::Generation);
        let out = job.run_chunk(0..cfg.replicates, &pool(2)).replicates;
        assert!(out.iter().all(|r| r.end != End::Unresolved), "{rule:?}");
        let rho = out.iter().filter(|r| r.end == End::Fixed).count() as f64 / 4000.0;
        let se = (want * (1.0 - want) / 4000.0).sqrt();
        assert!(
            (rho - want).abs() <= 4.5 * se,
            "{rule:?}: {rho} vs {want} (se {se})"
        );
        // the sweep of a deme this large takes hundreds of generations, never a handful
        let g = job.ticks_per_generation() as f64;
        assert!(out
            .iter()
            .filter(|r| r.end == End::Fixed)
            .all(|r| r.time as f64 / g > 100.0));
    }
}

#[test]
fn two_thousand_demes_of_a_hundred_million_count_time_without_overflow() {
    // N = 2e11: the generation limit in ticks is 50 * N events (1e13) for the event rules.
    let m_demes = 2000;
    let rows: Vec<Vec<f64>> = (0..m_demes)
        .map(|i| {
            let mut row = vec![0.0; m_demes];
            row[i] = 0.9;
            row[(i + 1) % m_demes] = 0.06;
            row[(i + 7) % m_demes] = 0.04;
            row
        })
        .collect();
    for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
        let m = model(vec![100_000_000; m_demes], &rows, rule, Scope::Deme, 0.5);
        assert_eq!(m.total(), 200_000_000_000);
        let cfg = EnsembleConfig {
            max_generations: 50,
            ..config(70, 40, Scheme::Auto)
        };
        let job = EnsembleJob::new(&m, Start::Deme(3), &cfg).unwrap();
        let g = job.ticks_per_generation();
        let out = job.run_chunk(0..40, &pool(2)).replicates;
        let unresolved: Vec<_> = out.iter().filter(|r| r.end == End::Unresolved).collect();
        // at s = 0.5 a surviving variant is still sweeping after 50 generations
        assert!(!unresolved.is_empty(), "{rule:?}");
        for r in &unresolved {
            assert_eq!(r.time, 50 * g, "{rule:?}");
        }
        assert!(out
            .iter()
            .filter(|r| r.end == End::Lost)
            .all(|r| r.time < 50 * g));
        if rule != Rule::WrightFisher {
            assert!(job.stepping() == Stepping::Generation && job.known_bias().is_some());
            // leaping: a sweep through demes of 10^8 would take more than 10^8 changes
            // event by event
            assert!(unresolved.iter().all(|r| r.state_changes < 10_000_000));
        }
    }
}
