//! The ensemble driver: bit-identical results for any thread count, chunk size and across a
//! checkpoint; unresolved replicates; cancellation; reducible matrices.

mod common;
use common::model;
use demefix_science::ensemble::{
    run, run_resumable, Accumulator, ChunkRecord, EnsembleConfig, EnsembleJob, EnsembleSummary,
    NoProgress, Scheme, StopReason, EARLY_STOP_GRID,
};
use demefix_science::{Model, Rule, Scope, Start};
use std::sync::atomic::{AtomicBool, Ordering};

fn pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
}

/// A dense asymmetric recruitment matrix on three demes.
fn three_deme_matrix() -> Vec<Vec<f64>> {
    vec![
        vec![0.5, 0.3, 0.2],
        vec![0.1, 0.6, 0.3],
        vec![0.25, 0.25, 0.5],
    ]
}

fn three_demes(rule: Rule) -> Model {
    model(vec![2, 3, 4], &three_deme_matrix(), rule, Scope::Deme, 0.3)
}

fn config(replicates: u64, chunk: u64, target: Option<f64>) -> EnsembleConfig {
    EnsembleConfig {
        seed: 2024,
        replicates,
        chunk_size: chunk,
        target_half_width: target,
        max_generations: 100_000,
        arrival_fractions: vec![0.5, 1.0],
        scheme: Scheme::Auto,
    }
}

fn summary(model: &Model, start: Start, cfg: &EnsembleConfig, threads: usize) -> EnsembleSummary {
    run(
        model,
        start,
        cfg,
        &pool(threads),
        &NoProgress,
        &AtomicBool::new(false),
    )
}

#[test]
fn the_summary_is_bit_identical_for_any_thread_count_and_chunk_size() {
    for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
        let m = three_demes(rule);
        for target in [None, Some(0.015)] {
            let reference = format!(
                "{:?}",
                summary(&m, Start::Uniform, &config(6000, 64, target), 1)
            );
            for threads in [1, 2, 4] {
                for chunk in [64, 1000] {
                    let got = summary(&m, Start::Uniform, &config(6000, chunk, target), threads);
                    assert_eq!(format!("{got:?}"), reference, "{rule:?} {threads} {chunk}");
                    if target.is_some() {
                        // the target is met on the fixed grid, never in between
                        assert_eq!(got.stop, StopReason::TargetReached, "{rule:?}");
                        assert_eq!(got.replicates % EARLY_STOP_GRID, 0);
                        assert!(got.replicates < 6000);
                    } else {
                        assert_eq!(got.stop, StopReason::Completed);
                        assert_eq!(got.replicates, 6000);
                    }
                }
            }
        }
    }
}

#[test]
fn a_resumed_ensemble_equals_an_uninterrupted_one() {
    let m = three_demes(Rule::DeathBirth);
    let whole = summary(&m, Start::AtBirth, &config(5000, 64, None), 2);
    // first half: commit a checkpoint after every chunk, stop once past half way
    let cancel = AtomicBool::new(false);
    let mut checkpoint = String::new();
    let mut records = Vec::new();
    let partial = run_resumable(
        &m,
        Start::AtBirth,
        &config(5000, 64, None),
        &pool(2),
        &NoProgress,
        &cancel,
        None,
        &mut |acc: &Accumulator, record: &ChunkRecord| {
            checkpoint = serde_json::to_string(acc).unwrap();
            records.push(serde_json::to_string(record).unwrap());
            if acc.next_replicate() >= 2500 {
                cancel.store(true, Ordering::Relaxed);
            }
        },
    )
    .unwrap();
    assert_eq!(partial.stop, StopReason::Cancelled);
    assert_eq!(partial.replicates, 2560); // whole chunks only
    let acc: Accumulator = serde_json::from_str(&checkpoint).unwrap();
    // the chunk records replayed in order rebuild the same accumulator; out of order they
    // are refused
    let job = EnsembleJob::new(&m, Start::AtBirth, &config(5000, 64, None)).unwrap();
    let records: Vec<ChunkRecord> = records
        .iter()
        .map(|text| serde_json::from_str(text).unwrap())
        .collect();
    let mut replayed = job.accumulator();
    assert!(replayed.apply(&records[1]).is_err());
    for record in &records {
        replayed.apply(record).unwrap();
    }
    assert_eq!(replayed, acc);
    assert!(replayed.apply(&records[0]).is_err());
    // resume with another chunk size and thread count
    let resumed = run_resumable(
        &m,
        Start::AtBirth,
        &config(5000, 1000, None),
        &pool(1),
        &NoProgress,
        &AtomicBool::new(false),
        Some(acc.clone()),
        &mut |_, _| {},
    )
    .unwrap();
    assert_eq!(format!("{resumed:?}"), format!("{whole:?}"));
    // a checkpoint does not resume another job
    let other = EnsembleConfig {
        seed: 1,
        ..config(5000, 64, None)
    };
    let err = run_resumable(
        &m,
        Start::AtBirth,
        &other,
        &pool(1),
        &NoProgress,
        &AtomicBool::new(false),
        Some(acc),
        &mut |_, _| {},
    );
    assert!(err.is_err());
}

#[test]
fn a_raised_cancellation_flag_stops_before_the_next_chunk() {
    let m = three_demes(Rule::BirthDeath);
    let got = run(
        &m,
        Start::Deme(1),
        &config(1000, 100, None),
        &pool(1),
        &NoProgress,
        &AtomicBool::new(true),
    );
    assert_eq!(got.stop, StopReason::Cancelled);
    assert_eq!(got.replicates, 0);
}

#[test]
fn replicates_past_the_generation_limit_are_unresolved_not_dropped() {
    for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
        let m = model(
            vec![30, 40],
            &[vec![0.9, 0.1], vec![0.2, 0.8]],
            rule,
            Scope::Deme,
            0.5,
        );
        let cfg = EnsembleConfig {
            max_generations: 3,
            ..config(2000, 500, None)
        };
        let got = summary(&m, Start::Deme(0), &cfg, 2);
        assert!(got.unresolved > 0, "{rule:?}");
        assert_eq!(got.fixed + got.lost + got.unresolved, got.replicates);
        assert_eq!(got.replicates, 2000);
        // the interval's upper end counts unresolved replicates as possible fixations
        assert!(got.ci95.1 >= (got.fixed + got.unresolved) as f64 / 2000.0 - 0.05);
    }
}

#[test]
fn a_start_that_cannot_reach_every_deme_never_fixes() {
    // Deme 0 recruits only from itself: a lineage starting in deme 1 never enters deme 0
    // (common practice: fixation needs a path to every deme). The second matrix splits the
    // population in two, so the chain freezes with deme 1 full of variants.
    let one_way = vec![vec![1.0, 0.0], vec![0.5, 0.5]];
    let split = vec![vec![1.0, 0.0], vec![0.0, 1.0]];
    for rule in [Rule::DeathBirth, Rule::WrightFisher] {
        for rows in [&one_way, &split] {
            let m = model(vec![3, 3], rows, rule, Scope::Deme, 1.0);
            let got = summary(&m, Start::Deme(1), &config(2000, 500, None), 2);
            assert_eq!(got.fixed, 0, "{rule:?} {rows:?}");
            assert_eq!(got.unresolved, 0, "{rule:?} {rows:?}");
            assert_eq!(got.lost, 2000);
        }
        // from deme 0 the variant does fix sometimes
        let m = model(vec![3, 3], &one_way, rule, Scope::Deme, 1.0);
        let got = summary(&m, Start::Deme(0), &config(2000, 500, None), 2);
        assert!(got.fixed > 100, "{rule:?}");
        // every deme's arrival at full frequency precedes or equals fixation
        let fix = got.fixation_quantiles.unwrap();
        assert!(got.arrival.iter().all(|d| d[&1].q95 <= fix.q95 + 1e-9));
    }
}

#[test]
fn replicates_stepped_in_lanes_equal_replicates_run_alone() {
    // the chunk runner steps small event-scheme replicates two at a time on a thread
    // (chain/lanes.rs); each must come out exactly as when it runs by itself, whatever the
    // lane, the block or the thread it lands on
    let b = three_deme_matrix();
    for (rule, scope) in [
        (Rule::DeathBirth, Scope::Deme),
        (Rule::DeathBirth, Scope::Neighbourhood),
        (Rule::BirthDeath, Scope::Deme),
    ] {
        // sizes 1 included: a start that fills its deme, and a chain that can freeze
        let m = model(vec![1, 3, 5], &b, rule, scope, 0.3);
        let mut cfg = config(203, 203, None);
        cfg.scheme = Scheme::Event;
        let job = EnsembleJob::new(&m, Start::Uniform, &cfg).unwrap();
        let alone: Vec<_> = (0..203).map(|q| job.replicate(q)).collect();
        for threads in [1, 2] {
            let chunk = job.run_chunk(0..203, &pool(threads));
            assert_eq!(
                chunk.replicates, alone,
                "{rule:?} {scope:?} {threads} threads"
            );
        }
        let tail = job.run_chunk(150..203, &pool(2));
        assert_eq!(
            tail.replicates,
            alone[150..],
            "{rule:?} {scope:?} offset range"
        );
    }
}
