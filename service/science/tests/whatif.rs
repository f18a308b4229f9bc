//! What-if interventions, paired ensembles and greedy plans: exact identities of the kernel
//! changes, exact zeros of a no-op and of a closed start deme, paired intervals against the
//! exact difference, and the budget and monotonicity of plans.

mod common;

use demefix_science::ensemble::paired::{self, newcombe_paired};
use demefix_science::ensemble::{EnsembleConfig, EnsembleJob};
use demefix_science::exact::{self, ExactConfig};
use demefix_science::start::combine;
use demefix_science::stats::{wilson, Z95};
use demefix_science::whatif::intervention::{apply, scenario, stays_mixed, total_flow};
use demefix_science::whatif::{
    evaluate_scenarios, greedy_plan, paired_link_effects, Change, EnsembleEvaluator, Evaluator,
    ExactEvaluator, ExactGradient, InterventionError, Link, PlanConfig, PlanStop,
};
use demefix_science::{Model, Rule, Scope, Start, StochasticMatrix};
use std::sync::atomic::AtomicBool;

const SIZES: [u64; 3] = [6, 8, 10];

fn rows() -> Vec<Vec<f64>> {
    vec![
        vec![0.80, 0.15, 0.05],
        vec![0.10, 0.85, 0.05],
        vec![0.05, 0.20, 0.75],
    ]
}

fn three_demes(rule: Rule) -> Model {
    common::model(SIZES.to_vec(), &rows(), rule, Scope::Deme, 0.1)
}

fn pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
}

fn config(seed: u64, replicates: u64, fractions: Vec<f64>) -> EnsembleConfig {
    EnsembleConfig {
        seed,
        replicates,
        chunk_size: 1000,
        target_half_width: None,
        max_generations: 1_000_000,
        arrival_fractions: fractions,
        ..EnsembleConfig::default()
    }
}

fn exact_rho(model: &Model, start: Start) -> f64 {
    let solution = exact::solve(model, &ExactConfig::default()).unwrap();
    combine(&start.deme_weights(model), &solution.per_deme).fixation_probability
}

#[test]
fn a_link_change_moves_probability_to_the_receiving_row_s_retention() {
    // death-birth: the link 0 -> 2 is B[2][0]; halving it gives 0.025 back to B[2][2].
    let model = three_demes(Rule::DeathBirth);
    let link = Link { from: 0, to: 2 };
    let k = apply(&model, &[Change::ScaleLink { link, factor: 0.5 }]).unwrap();
    let mut want = rows();
    want[2][0] = 0.025;
    want[2][2] = 0.775;
    let want = StochasticMatrix::from_weights(&want).unwrap();
    for i in 0..3 {
        for j in 0..3 {
            assert!((k.get(i, j) - want.get(i, j)).abs() < 1e-15, "({i}, {j})");
        }
    }
    // birth-death: the same link is F[0][2], so row 0 keeps it.
    let bd = three_demes(Rule::BirthDeath);
    let k = apply(&bd, &[Change::CloseLink(link)]).unwrap();
    assert_eq!(k.get(0, 2), 0.0);
    assert!((k.get(0, 0) - 0.85).abs() < 1e-15);
    // every flow into deme 1 under death-birth: row 1 of B.
    let k = apply(
        &model,
        &[Change::ScaleInto {
            deme: 1,
            factor: 2.0,
        }],
    )
    .unwrap();
    assert!((k.get(1, 0) - 0.2).abs() < 1e-15 && (k.get(1, 1) - 0.7).abs() < 1e-15);
    // every flow out of deme 1 under death-birth: column 1 of B, each row's retention.
    let k = apply(
        &model,
        &[Change::ScaleOutOf {
            deme: 1,
            factor: 0.0,
        }],
    )
    .unwrap();
    assert_eq!((k.get(0, 1), k.get(2, 1)), (0.0, 0.0));
    assert!((k.get(0, 0) - 0.95).abs() < 1e-15 && (k.get(2, 2) - 0.95).abs() < 1e-15);
}

#[test]
fn bad_changes_are_all_reported_with_their_index() {
    let model = three_demes(Rule::DeathBirth);
    let mut rows = rows();
    rows[1][2] = 0.0; // no link 2 -> 1 under death-birth
    let model_gap = common::model(SIZES.to_vec(), &rows, Rule::DeathBirth, Scope::Deme, 0.1);
    let errors = apply(
        &model_gap,
        &[
            Change::ScaleLink {
                link: Link { from: 2, to: 1 },
                factor: 0.5,
            },
            Change::ScaleOutOf {
                deme: 0,
                factor: -1.0,
            },
            Change::CloseLink(Link { from: 1, to: 1 }),
            Change::ScaleInto {
                deme: 7,
                factor: 1.0,
            },
        ],
    )
    .unwrap_err();
    let indices: Vec<usize> = errors.iter().map(|(i, _)| *i).collect();
    assert_eq!(indices, vec![0, 1, 2, 3]);
    assert!(matches!(errors[0].1, InterventionError::NoSuchLink { .. }));
    assert!(matches!(errors[1].1, InterventionError::Factor { .. }));
    assert!(matches!(
        errors[2].1,
        InterventionError::SelfLink { deme: 1 }
    ));
    assert!(matches!(
        errors[3].1,
        InterventionError::DemeOutOfRange { .. }
    ));
    // Scaling the links into deme 2 by 6 needs 5 x 0.25 = 1.25 from a retention of 0.75.
    let errors = apply(
        &model,
        &[Change::ScaleInto {
            deme: 2,
            factor: 6.0,
        }],
    )
    .unwrap_err();
    assert!(matches!(
        errors[0].1,
        InterventionError::RetentionExhausted { row: 2, .. }
    ));
}

#[test]
fn a_what_if_that_changes_nothing_gives_exactly_zero_change() {
    let cancel = AtomicBool::new(false);
    let pool = pool(2);
    let noop = vec![
        Change::ScaleLink {
            link: Link { from: 0, to: 1 },
            factor: 1.0,
        },
        Change::ScaleOutOf {
            deme: 2,
            factor: 1.0,
        },
        Change::ScaleInto {
            deme: 0,
            factor: 1.0,
        },
    ];
    for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
        let model = three_demes(rule);
        assert_eq!(
            apply(&model, &noop).unwrap().dense(),
            model.kernel().dense(),
            "factor 1 leaves the kernel unchanged bit for bit"
        );
        let starts = vec![Start::Deme(0), Start::Uniform, Start::AtBirth];
        let exact = ExactEvaluator::new(ExactConfig::default(), starts.clone(), &pool, &cancel);
        let ensemble = EnsembleEvaluator::new(config(7, 3000, vec![0.5]), starts, &pool, &cancel);
        let by_exact = evaluate_scenarios(&exact, &model, std::slice::from_ref(&noop)).unwrap();
        let by_ensemble =
            evaluate_scenarios(&ensemble, &model, std::slice::from_ref(&noop)).unwrap();
        for c in by_exact.iter().chain(&by_ensemble) {
            assert_eq!(c.objective_change.value, 0.0, "{rule:?}");
            for s in &c.per_start {
                assert_eq!(s.change.value, 0.0, "{rule:?} {:?}", s.start);
                assert_eq!(s.fixation_time.unwrap().change, 0.0);
                for by_fraction in &s.arrival {
                    for a in by_fraction.values() {
                        assert_eq!(a.mean.change, 0.0);
                        assert_eq!(a.baseline_median, a.scenario_median);
                    }
                }
                if let Some(t) = s.pairs {
                    assert_eq!(t[0][1] + t[1][0], 0, "no discordant pairs");
                    assert!(t[0][0] > 0, "some replicates fixed");
                }
            }
        }
    }
}

#[test]
fn closing_every_link_out_of_the_start_deme_gives_fixation_probability_zero() {
    let cancel = AtomicBool::new(false);
    let pool = pool(2);
    let closed = vec![Change::ScaleOutOf {
        deme: 1,
        factor: 0.0,
    }];
    for rule in [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher] {
        let model = three_demes(rule);
        let starts = vec![Start::Deme(1)];
        let exact = ExactEvaluator::new(ExactConfig::default(), starts.clone(), &pool, &cancel);
        let ensemble = EnsembleEvaluator::new(config(11, 2000, vec![]), starts, &pool, &cancel);
        let e = &evaluate_scenarios(&exact, &model, std::slice::from_ref(&closed)).unwrap()[0];
        let n = &evaluate_scenarios(&ensemble, &model, std::slice::from_ref(&closed)).unwrap()[0];
        assert_eq!(e.per_start[0].scenario.value, 0.0, "{rule:?}");
        assert!(e.per_start[0].baseline.value > 0.0);
        assert_eq!(n.per_start[0].scenario.value, 0.0, "{rule:?}");
        assert!(n.per_start[0].baseline.value > 0.0);
        assert!(
            e.per_start[0].fixation_time.is_none(),
            "no fixation, no time"
        );
    }
}

#[test]
fn an_exact_what_if_equals_the_difference_of_two_exact_solves() {
    let cancel = AtomicBool::new(false);
    let pool = pool(1);
    let changes = vec![
        Change::ScaleLink {
            link: Link { from: 1, to: 0 },
            factor: 0.3,
        },
        Change::ScaleInto {
            deme: 1,
            factor: 1.5,
        },
    ];
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let model = three_demes(rule);
        // The same scenario written out by hand from the module's definition.
        let mut want = rows();
        match rule {
            Rule::DeathBirth => {
                // link 1 -> 0 is B[0][1]; links into 1 are row 1 of B
                want[0][0] += 0.15 * 0.7;
                want[0][1] = 0.045;
                want[1][1] -= 0.5 * (0.10 + 0.05);
                want[1][0] = 0.15;
                want[1][2] = 0.075;
            }
            _ => {
                // link 1 -> 0 is F[1][0]; links into 1 are column 1 of F
                want[1][1] += 0.10 * 0.7;
                want[1][0] = 0.03;
                want[0][0] -= 0.5 * 0.15;
                want[0][1] = 0.225;
                want[2][2] -= 0.5 * 0.20;
                want[2][1] = 0.30;
            }
        }
        let by_hand = common::model(SIZES.to_vec(), &want, rule, Scope::Deme, 0.1);
        let starts = vec![Start::Deme(0), Start::Deme(2), Start::Uniform];
        let exact = ExactEvaluator::new(ExactConfig::default(), starts.clone(), &pool, &cancel);
        let c = &evaluate_scenarios(&exact, &model, std::slice::from_ref(&changes)).unwrap()[0];
        for (s, &start) in c.per_start.iter().zip(&starts) {
            let diff = exact_rho(&by_hand, start) - exact_rho(&model, start);
            assert!(diff.abs() > 1e-4, "the scenario matters");
            assert!((s.change.value - diff).abs() < 1e-12, "{rule:?} {start:?}");
            assert!(s.change.ci95.is_none());
        }
    }
}

#[test]
fn the_paired_interval_covers_the_exact_difference_and_is_narrower_than_unpaired() {
    // Tolerance: the ensemble change lies within 4.5 standard errors (half-width / 1.96) of
    // the exact difference, and the exact difference lies inside the paired 95% interval at
    // this fixed seed.
    let cancel = AtomicBool::new(false);
    let pool = pool(2);
    for rule in [Rule::DeathBirth, Rule::WrightFisher] {
        let model = three_demes(rule);
        let closed = scenario(&model, &[Change::CloseLink(Link { from: 0, to: 1 })]).unwrap();
        let start = Start::Deme(0);
        let exact_diff = exact_rho(&closed, start) - exact_rho(&model, start);
        let n = 40_000;
        let p = paired::run_paired(
            &model,
            &closed,
            start,
            &config(2024, n, vec![]),
            &pool,
            &cancel,
        )
        .unwrap();
        let (lo, hi) = p.ci95;
        let se = (hi - lo) / (2.0 * Z95);
        assert!(
            (p.change_fixation_probability - exact_diff).abs() <= 4.5 * se,
            "{rule:?}: {} vs exact {exact_diff} (se {se})",
            p.change_fixation_probability
        );
        assert!(
            lo <= exact_diff && exact_diff <= hi,
            "{rule:?}: [{lo}, {hi}] {exact_diff}"
        );
        // Independent ensembles: Wilson half-widths added in quadrature.
        let ((fa, _), (fb, _)) = p.counts();
        let half = |x: u64| {
            let (l, h) = wilson(x, n, Z95);
            (h - l) / 2.0
        };
        let unpaired = (half(fa).powi(2) + half(fb).powi(2)).sqrt();
        assert!(
            (hi - lo) / 2.0 < unpaired,
            "{rule:?}: pairing narrows the interval"
        );
    }
}

#[test]
fn paired_summaries_do_not_depend_on_threads_or_chunks() {
    let cancel = AtomicBool::new(false);
    let model = three_demes(Rule::DeathBirth);
    let scaled = scenario(
        &model,
        &[Change::ScaleOutOf {
            deme: 0,
            factor: 0.4,
        }],
    )
    .unwrap();
    let mut cfg = config(5, 3000, vec![0.5, 1.0]);
    let one = paired::run_paired(&model, &scaled, Start::Uniform, &cfg, &pool(1), &cancel).unwrap();
    cfg.chunk_size = 250;
    let two = paired::run_paired(&model, &scaled, Start::Uniform, &cfg, &pool(2), &cancel).unwrap();
    assert_eq!(one, two);
    // The baseline of a pair is the job's own ensemble: same key, same replicates.
    let job = EnsembleJob::new(&model, Start::Uniform, &cfg).unwrap();
    let own = job.run_chunk(0..3000, &pool(2));
    let fixed = own
        .replicates
        .iter()
        .filter(|o| o.end == demefix_science::ensemble::End::Fixed)
        .count() as u64;
    assert_eq!(one.counts().0 .0, fixed);
}

#[test]
fn newcombe_paired_interval_matches_the_hybrid_score_formula_by_hand() {
    // A table of 50 pairs: 10 both, 15 only first, 5 only second, 20 neither, worked by hand
    // from Newcombe (1998), Stat. Med. 17:2635-2650, method 10 (formula from memory):
    // p1 = 25/50, p2 = 15/50, Wilson (z = 1.96) intervals of each margin, phi from
    // ad - bc = 10 * 20 - 15 * 5 = 125 > n/2, reduced to 100, over sqrt(25 * 25 * 15 * 35).
    let t = [[20, 5], [15, 10]]; // t[first][second], index 1 = success
    let (lo, hi) = newcombe_paired(t, Z95);
    let (l1, u1) = wilson(25, 50, Z95);
    let (l2, u2) = wilson(15, 50, Z95);
    let phi = 100.0 / (25.0f64 * 25.0 * 15.0 * 35.0).sqrt();
    let (p1, p2) = (0.5, 0.3);
    let d = p2 - p1;
    let want_lo =
        d - ((p2 - l2).powi(2) - 2.0 * phi * (p2 - l2) * (u1 - p1) + (u1 - p1).powi(2)).sqrt();
    let want_hi =
        d + ((u2 - p2).powi(2) - 2.0 * phi * (u2 - p2) * (p1 - l1) + (p1 - l1).powi(2)).sqrt();
    assert!((lo - want_lo).abs() < 1e-15 && (hi - want_hi).abs() < 1e-15);
    assert!(lo < -0.2 && -0.2 < hi);
}

#[test]
fn an_exact_plan_never_exceeds_its_budget_and_never_raises_the_objective() {
    let cancel = AtomicBool::new(false);
    let pool = pool(2);
    let sizes = vec![3, 4, 5, 3];
    let rows = vec![
        vec![0.70, 0.20, 0.05, 0.05],
        vec![0.10, 0.75, 0.10, 0.05],
        vec![0.05, 0.15, 0.70, 0.10],
        vec![0.20, 0.05, 0.05, 0.70],
    ];
    for (rule, budget) in [(Rule::DeathBirth, 0.3), (Rule::BirthDeath, 0.55)] {
        let model = common::model(sizes.clone(), &rows, rule, Scope::Deme, 0.2);
        let starts = vec![Start::Uniform, Start::Deme(1)];
        let evaluator = ExactEvaluator::new(ExactConfig::default(), starts.clone(), &pool, &cancel);
        let cfg = PlanConfig {
            budget,
            max_steps: 10,
            shortlist: 3,
        };
        let gradient = ExactGradient {
            config: &ExactConfig::default(),
            pool: &pool,
        };
        let plan = greedy_plan(&evaluator, &model, &cfg, Some(gradient)).unwrap();
        assert!(!plan.steps.is_empty(), "{rule:?}");
        assert!(
            matches!(
                plan.stop,
                PlanStop::Budget | PlanStop::NoImprovement | PlanStop::Steps
            ),
            "{:?}",
            plan.stop
        );
        let mut last = plan.baseline.value;
        let mut used = 0.0;
        for step in &plan.steps {
            assert_eq!(step.before.value, last);
            assert!(step.after.value < step.before.value, "{rule:?}: {step:?}");
            assert!((step.change.value - (step.after.value - step.before.value)).abs() < 1e-15);
            assert!(step.budget_used <= budget && step.budget_used >= used);
            used += step.flow_cut / plan.total_flow;
            assert!(used <= budget * (1.0 + 1e-12));
            assert_eq!(step.ranked_by.as_str(), "exact_adjoint");
            last = step.after.value;
        }
        // The reported objective is the exact answer of the final kernel.
        let last_model = model.with_kernel(plan.kernel.clone()).unwrap();
        let final_objective: f64 = starts
            .iter()
            .map(|&s| exact_rho(&last_model, s))
            .sum::<f64>()
            / 2.0;
        assert!((final_objective - last).abs() < 1e-12);
        assert!(total_flow(&last_model) >= plan.total_flow * (1.0 - budget) * (1.0 - 1e-12));
        let exact_value = evaluator.objective(
            &evaluator
                .run(&last_model, demefix_science::whatif::Streams::Job)
                .unwrap(),
        );
        assert_eq!(exact_value.value, last);
    }
}

#[test]
fn an_ensemble_plan_reports_paired_steps_inside_its_budget() {
    let cancel = AtomicBool::new(false);
    let pool = pool(2);
    let model = three_demes(Rule::WrightFisher);
    let evaluator = EnsembleEvaluator::new(
        config(3, 4000, vec![]),
        vec![Start::Uniform],
        &pool,
        &cancel,
    );
    let cfg = PlanConfig {
        budget: 0.5,
        max_steps: 3,
        shortlist: 2,
    };
    let plan = greedy_plan(&evaluator, &model, &cfg, None).unwrap();
    for step in &plan.steps {
        assert!(step.budget_used <= 0.5);
        let (lo, hi) = step.change.ci95.unwrap();
        assert!(lo <= step.change.value && step.change.value <= hi);
        assert_eq!(step.candidates.len(), 2);
        // Wright-Fisher has no exact adjoint, and s > 0: branching ranks.
        assert_eq!(step.ranked_by.as_str(), "approximation:branching");
    }
    assert!(!plan.steps.is_empty(), "{:?}", plan.stop);
}

#[test]
fn paired_link_secants_agree_with_exact_secants() {
    // Tolerance 4.5 standard errors of the paired interval (half-width / 1.96).
    let cancel = AtomicBool::new(false);
    let pool = pool(2);
    let model = three_demes(Rule::DeathBirth);
    let start = Start::Deme(0);
    let effects = paired_link_effects(
        &model,
        start,
        &config(99, 30_000, vec![]),
        2,
        &pool,
        &cancel,
    )
    .unwrap();
    assert_eq!(effects.len(), 2);
    for e in &effects {
        let moved = scenario(
            &model,
            &[Change::ScaleLink {
                link: e.link,
                factor: 0.5,
            }],
        )
        .unwrap();
        let exact_secant = (exact_rho(&moved, start) - exact_rho(&model, start)) / e.delta;
        let se = (e.ci95.1 - e.ci95.0) / (2.0 * Z95);
        assert!(
            (e.d_fixation_probability - exact_secant).abs() <= 4.5 * se,
            "{:?}: {} vs {exact_secant} (se {se})",
            e.link,
            e.d_fixation_probability
        );
    }
}

#[test]
fn a_deme_fed_by_two_separate_source_groups_is_found() {
    // Death-birth, B row = receiving deme: deme 0 recruits only from itself, demes 1 and 2
    // only from each other, deme 3 from everyone: it is fed forever by {0} and {1, 2}.
    let rows = vec![
        vec![1.0, 0.0, 0.0, 0.0],
        vec![0.0, 0.9, 0.1, 0.0],
        vec![0.0, 0.15, 0.85, 0.0],
        vec![0.2, 0.05, 0.05, 0.7],
    ];
    let model = common::model(vec![3, 4, 5, 3], &rows, Rule::DeathBirth, Scope::Deme, 0.2);
    let found = stays_mixed(&model).unwrap();
    assert_eq!((found.deme, found.sources), (3, (0, 1)));
    assert!(exact::solve(&model, &ExactConfig::default()).is_err());
    // Two separate groups with nothing in common freeze instead: no such deme.
    let apart = vec![
        vec![0.9, 0.1, 0.0, 0.0],
        vec![0.2, 0.8, 0.0, 0.0],
        vec![0.0, 0.0, 0.7, 0.3],
        vec![0.0, 0.0, 0.4, 0.6],
    ];
    let apart = common::model(vec![3, 4, 5, 3], &apart, Rule::DeathBirth, Scope::Deme, 0.2);
    assert_eq!(stays_mixed(&apart), None);
    assert_eq!(stays_mixed(&three_demes(Rule::BirthDeath)), None);
}
