//! Kernel gradients of the exact method against central finite differences of the exact
//! solver itself.
//!
//! The adjoint formulas are those of references.md §7.1 (Kemeny & Snell 1960, *Finite Markov
//! Chains*, fundamental matrix; Caswell 2013, Linear Algebra Appl. 438:1727-1745, sensitivity of
//! absorbing chains). A link effect is checked by moving `ε` of probability from the row's
//! retention into the link (rows stay stochastic) and solving again, at `±ε`.

mod common;

use demefix_science::exact::{self, ExactConfig, SolverChoice};
use demefix_science::sensitivity::{rank_by_effect, KernelPartials};
use demefix_science::start::{combine, DemeAnswer};
use demefix_science::{Model, Population, Rule, Scope, Start, StochasticMatrix};

const STEP: f64 = 1e-5;

fn kernel_rows(model: &Model) -> Vec<Vec<f64>> {
    let k = model.kernel();
    (0..k.dim())
        .map(|i| (0..k.dim()).map(|j| k.get(i, j)).collect())
        .collect()
}

/// The model with `delta` moved from `K_ii` to `K_ij`.
fn moved(model: &Model, i: usize, j: usize, delta: f64) -> Model {
    let mut rows = kernel_rows(model);
    rows[i][j] += delta;
    rows[i][i] -= delta;
    let pop = Population::new(model.sizes().to_vec()).unwrap();
    Model::new(
        &pop,
        StochasticMatrix::from_weights(&rows).unwrap(),
        model.rule(),
        model.scope(),
        model.fitness() - 1.0,
    )
    .unwrap()
}

fn weighted(model: &Model, start: Start, config: &ExactConfig) -> DemeAnswer {
    let solution = exact::solve(model, config).unwrap();
    combine(&start.deme_weights(model), &solution.per_deme)
}

/// Checks every link effect of `model` for `start` on both solver paths.
fn check(model: &Model, start: Start) {
    let weights = start.deme_weights(model);
    for solver in [SolverChoice::Direct, SolverChoice::Iterative] {
        let config = ExactConfig {
            solver,
            tolerance: 1e-13,
            ..ExactConfig::default()
        };
        let got = exact::sensitivity(model, &config, &weights)
            .unwrap_or_else(|e| panic!("{solver:?}: {e:?}"));
        let plain = weighted(model, start, &config);
        assert!(
            (got.answer.fixation_probability - plain.fixation_probability).abs() < 1e-11,
            "{got:?} vs {plain:?}"
        );
        let rule = model.rule();
        let effects = [
            got.d_fixation_probability.link_effects(rule),
            got.d_mean_absorption_generations.link_effects(rule),
            got.d_mean_fixation_generations.link_effects(rule),
        ];
        assert!(!effects[0].is_empty());
        for (n, link) in effects[0].iter().enumerate() {
            let up = weighted(&moved(model, link.row, link.col, STEP), start, &config);
            let down = weighted(&moved(model, link.row, link.col, -STEP), start, &config);
            let fd = [
                (up.fixation_probability - down.fixation_probability) / (2.0 * STEP),
                (up.mean_absorption_generations - down.mean_absorption_generations) / (2.0 * STEP),
                (up.mean_fixation_generations - down.mean_fixation_generations) / (2.0 * STEP),
            ];
            let values = [
                plain.fixation_probability,
                plain.mean_absorption_generations,
                plain.mean_fixation_generations,
            ];
            for q in 0..3 {
                let adjoint = effects[q][n].derivative;
                // central difference: truncation O(STEP^2) and round-off ~1e-15 / STEP of the
                // answer's own size
                let tolerance = 1e-6 * adjoint.abs() + 1e-8 * values[q].abs().max(1e-3);
                assert!(
                    (adjoint - fd[q]).abs() <= tolerance,
                    "{rule:?} {solver:?} {start:?} quantity {q} link {}->{}: adjoint {adjoint:e}, \
                     finite difference {:e}",
                    link.from,
                    link.to,
                    fd[q]
                );
            }
        }
    }
}

fn three_demes(rule: Rule, scope: Scope, s: f64) -> Model {
    common::model(
        vec![4, 5, 6],
        &[
            vec![0.7, 0.2, 0.1],
            vec![0.05, 0.8, 0.15],
            vec![0.3, 0.1, 0.6],
        ],
        rule,
        scope,
        s,
    )
}

#[test]
fn death_birth_deme_scope_gradients_match_finite_differences() {
    let model = three_demes(Rule::DeathBirth, Scope::Deme, 0.2);
    check(&model, Start::Deme(1));
    check(&model, Start::Uniform);
}

#[test]
fn death_birth_neighbourhood_scope_gradients_match_finite_differences() {
    let model = three_demes(Rule::DeathBirth, Scope::Neighbourhood, 0.3);
    check(&model, Start::Deme(0));
    check(&model, Start::AtBirth);
}

#[test]
fn birth_death_gradients_match_finite_differences() {
    let model = three_demes(Rule::BirthDeath, Scope::Deme, 0.15);
    check(&model, Start::Deme(2));
    check(&model, Start::Uniform);
}

#[test]
fn graph_gradients_match_finite_differences() {
    // a 7-node cycle with self-weights (one individual per node), so every row has a
    // retention entry to move probability from
    let mut rows = common::cycle(7);
    for (i, row) in rows.iter_mut().enumerate() {
        row[i] = 1.0;
        row[(i + 3) % 7] += 0.5;
    }
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let model = common::model(vec![1; 7], &rows, rule, Scope::Deme, 0.25);
        check(&model, Start::Uniform);
    }
}

#[test]
fn neutral_uniform_start_fixation_does_not_depend_on_any_link() {
    // Neutral fixation from deme k is the reproductive value of one individual there, ν_k/n_k
    // for death-birth and w_k for birth-death (references.md §5.1, "exact for DB and WF"; the
    // per-individual values sum to 1 over all N individuals), so from a uniformly chosen
    // individual the neutral fixation probability is 1/N whatever the kernel ("Neutral
    // ρ_uniform = 1/N on any graph", ibid.), and every link effect on it is 0.
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let model = common::model(
            vec![3, 4, 2],
            &[
                vec![0.6, 0.3, 0.1],
                vec![0.1, 0.6, 0.3],
                vec![0.5, 0.1, 0.4],
            ],
            rule,
            Scope::Deme,
            0.0,
        );
        let weights = Start::Uniform.deme_weights(&model);
        let got = exact::sensitivity(&model, &ExactConfig::default(), &weights).unwrap();
        assert!((got.answer.fixation_probability - 1.0 / 9.0).abs() < 1e-13);
        let ranked = rank_by_effect(got.d_fixation_probability.link_effects(rule));
        assert_eq!(ranked.len(), 6);
        for link in &ranked {
            assert!(link.derivative.abs() < 1e-12, "{rule:?}: {link:?}");
        }
        // the same objective from one deme does depend on the links
        let mut one = vec![0.0; 3];
        one[0] = 1.0;
        let from_0 = exact::sensitivity(&model, &ExactConfig::default(), &one).unwrap();
        let effects = rank_by_effect(from_0.d_fixation_probability.link_effects(rule));
        assert!(effects[0].derivative.abs() > 1e-3, "{rule:?}: {effects:?}");
        assert!(effects
            .windows(2)
            .all(|w| w[0].derivative.abs() >= w[1].derivative.abs()));
    }
    let full = common::model(
        vec![2; 3],
        &[vec![1.0; 3], vec![1.0; 3], vec![1.0; 3]],
        Rule::DeathBirth,
        Scope::Deme,
        0.1,
    );
    assert_eq!(
        KernelPartials::structural_entries(full.kernel()).len(),
        9,
        "every entry of a full 3x3 kernel, the diagonal once"
    );
}

#[test]
fn wright_fisher_is_refused_with_a_reason() {
    let model = three_demes(Rule::WrightFisher, Scope::Deme, 0.1);
    let weights = Start::Uniform.deme_weights(&model);
    assert!(exact::sensitivity(&model, &ExactConfig::default(), &weights).is_err());
}
