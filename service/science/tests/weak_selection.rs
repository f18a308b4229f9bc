//! The first-order weak-selection coefficients agree with the exact chain: the neutral term
//! with the exact solution at `s = 0`, the slope with a central finite difference of the exact
//! fixation probability in `s` (model contract check "first-order weak-selection coefficients
//! equal a central finite difference of the exact solver"; formulas of references.md §5).

use demefix_science::exact::{self, ExactConfig};
use demefix_science::weak::{self, PairSolver, WeakConfig, WeakSelection};
use demefix_science::well_mixed;
use demefix_science::{Model, Population, Rule, Scope, Start, StochasticMatrix};

/// Step of the central differences. The slope is compared with the Richardson combination
/// `(4 D(h/2) - D(h)) / 3` of central differences `D(h) = (rho(h) - rho(-h)) / 2h`, whose
/// truncation error is `O(h^4)` (about 1e-12 here) and rounding error about `1e-16 / h`.
const STEP: f64 = 1e-3;
/// Relative tolerance of the slope comparison (the largest disagreement seen was 9e-12).
const SLOPE_TOLERANCE: f64 = 1e-9;

fn build(sizes: &[u64], rows: &[Vec<f64>], rule: Rule, scope: Scope) -> Model {
    let population = Population::new(sizes.to_vec()).unwrap();
    let kernel = StochasticMatrix::from_weights(rows).unwrap();
    Model::new(&population, kernel, rule, scope, 0.0).unwrap()
}

fn exact_rho(model: &Model, s: f64) -> Vec<f64> {
    let solution =
        exact::solve(&model.with_selection(s).unwrap(), &ExactConfig::default()).unwrap();
    solution
        .per_deme
        .iter()
        .map(|a| a.fixation_probability)
        .collect()
}

/// Checks `neutral` against the exact chain at `s = 0` and `slope` against
/// `(rho(h) - rho(-h)) / 2h`, deme by deme; returns the coefficients.
fn assert_matches_exact(label: &str, model: &Model) -> WeakSelection {
    let weak = weak::first_order(model).unwrap();
    let neutral = exact_rho(model, 0.0);
    let fd = richardson(|s| exact_rho(model, s));
    for k in 0..model.demes() {
        assert!(
            (weak.neutral[k] - neutral[k]).abs() < 1e-11,
            "{label} deme {k}: neutral {} vs exact {}",
            weak.neutral[k],
            neutral[k]
        );
        assert!(
            (weak.slope[k] - fd[k]).abs() <= SLOPE_TOLERANCE * fd[k].abs(),
            "{label} deme {k}: slope {} vs finite difference {}",
            weak.slope[k],
            fd[k]
        );
    }
    weak
}

/// `(4 D(h/2) - D(h)) / 3`, componentwise, for `rho: s -> per-deme values`.
fn richardson(rho: impl Fn(f64) -> Vec<f64>) -> Vec<f64> {
    let central = |h: f64| -> Vec<f64> {
        let (up, down) = (rho(h), rho(-h));
        up.iter()
            .zip(&down)
            .map(|(a, b)| (a - b) / (2.0 * h))
            .collect()
    };
    let (coarse, fine) = (central(STEP), central(STEP / 2.0));
    coarse
        .iter()
        .zip(&fine)
        .map(|(c, f)| (4.0 * f - c) / 3.0)
        .collect()
}

fn two_demes() -> (Vec<u64>, Vec<Vec<f64>>) {
    (vec![3, 5], vec![vec![0.7, 0.3], vec![0.1, 0.9]])
}

fn three_demes() -> (Vec<u64>, Vec<Vec<f64>>) {
    (
        vec![2, 3, 4],
        vec![
            vec![0.5, 0.3, 0.2],
            vec![0.1, 0.6, 0.3],
            vec![0.25, 0.25, 0.5],
        ],
    )
}

/// W5 of references.md §5.3: a symmetric weighted graph on five nodes.
fn w5() -> Vec<Vec<f64>> {
    vec![
        vec![0.0, 2.0, 1.0, 0.0, 0.0],
        vec![2.0, 0.0, 1.0, 1.0, 0.0],
        vec![1.0, 1.0, 0.0, 3.0, 1.0],
        vec![0.0, 1.0, 3.0, 0.0, 1.0],
        vec![0.0, 0.0, 1.0, 1.0, 0.0],
    ]
}

#[test]
fn death_birth_island_slopes_match_finite_differences() {
    for (sizes, rows) in [two_demes(), three_demes()] {
        let model = build(&sizes, &rows, Rule::DeathBirth, Scope::Deme);
        let weak = assert_matches_exact(&format!("DB deme {sizes:?}"), &model);
        // Neutral term nu_k / n_k (model contract; references.md §5.1, martingale argument).
        let nu = model.kernel().stationary();
        for k in 0..sizes.len() {
            assert!((weak.neutral[k] - nu[k] / sizes[k] as f64).abs() < 1e-12);
        }
    }
}

#[test]
fn wright_fisher_island_slopes_match_finite_differences() {
    for (sizes, rows) in [two_demes(), three_demes()] {
        let model = build(&sizes, &rows, Rule::WrightFisher, Scope::Deme);
        assert_matches_exact(&format!("WF deme {sizes:?}"), &model);
    }
}

#[test]
fn birth_death_island_slopes_match_finite_differences() {
    // The same matrices read as dispersal F.
    for (sizes, rows) in [two_demes(), three_demes()] {
        let model = build(&sizes, &rows, Rule::BirthDeath, Scope::Deme);
        assert_matches_exact(&format!("BD {sizes:?}"), &model);
    }
}

#[test]
fn neighbourhood_scope_slopes_match_finite_differences() {
    for (sizes, rows) in [two_demes(), three_demes()] {
        for rule in [Rule::DeathBirth, Rule::WrightFisher] {
            let model = build(&sizes, &rows, rule, Scope::Neighbourhood);
            assert_matches_exact(&format!("{rule:?} neighbourhood {sizes:?}"), &model);
        }
    }
}

#[test]
fn demes_of_one_individual_match_finite_differences() {
    let sizes = [1, 4, 2];
    let rows = vec![
        vec![0.2, 0.5, 0.3],
        vec![0.3, 0.6, 0.1],
        vec![0.4, 0.2, 0.4],
    ];
    for (rule, scope) in [
        (Rule::DeathBirth, Scope::Deme),
        (Rule::DeathBirth, Scope::Neighbourhood),
        (Rule::WrightFisher, Scope::Deme),
        (Rule::WrightFisher, Scope::Neighbourhood),
        (Rule::BirthDeath, Scope::Deme),
    ] {
        let model = build(&sizes, &rows, rule, scope);
        assert_matches_exact(&format!("{rule:?} {scope:?} (1,4,2)"), &model);
    }
}

#[test]
fn weighted_graph_slopes_match_finite_differences_and_the_reference_table() {
    let sizes = [1; 5];
    // BD rho' (uniform) = 0.4105457474 and DB rho' (uniform) = 0.2448154222 on W5:
    // references.md §5.3 table (maintainers' computation reproducing the Allen et al. 2021,
    // PLoS Comput. Biol. 17:e1008695, approach).
    for (rule, want) in [
        (Rule::BirthDeath, 0.4105457474),
        (Rule::DeathBirth, 0.2448154222),
    ] {
        let model = build(&sizes, &w5(), rule, Scope::Neighbourhood);
        let weak = assert_matches_exact(&format!("{rule:?} W5"), &model);
        let (rho, slope) = weak.combine(&Start::Uniform.deme_weights(&model));
        assert!((rho - 0.2).abs() < 1e-12, "{rho}");
        assert!((slope - want).abs() < 1e-9, "{rule:?}: {slope}");
    }
}

#[test]
fn graph_check_values_of_the_published_figure_claims() {
    // Allen et al. (2021) PLoS Comput. Biol. 17:e1008695, Fig. 1 and Fig. 8 captions as
    // reproduced in references.md §5.3/§8: BD rho' (uniform) = 0.4 on K5, and the star with
    // five leaves is an amplifier of weak selection under uniform initialisation,
    // rho' = 0.5876068376 > (N - 1)/(2N).
    let complete: Vec<Vec<f64>> = (0..5)
        .map(|i| (0..5).map(|j| f64::from(u8::from(i != j))).collect())
        .collect();
    let star: Vec<Vec<f64>> = (0..6)
        .map(|i| {
            (0..6)
                .map(|j| f64::from(u8::from((i == 0) != (j == 0))))
                .collect()
        })
        .collect();
    for (w, want) in [(complete, 0.4), (star, 0.5876068376)] {
        let n = w.len();
        let model = build(&vec![1; n], &w, Rule::BirthDeath, Scope::Deme);
        let weak = assert_matches_exact(&format!("BD graph n={n}"), &model);
        let (_, slope) = weak.combine(&vec![1.0 / n as f64; n]);
        assert!((slope - want).abs() < 1e-9, "n={n}: {slope}");
    }
}

#[test]
fn one_deme_slopes_are_the_well_mixed_derivatives() {
    // Moran (1958) / Nowak (2006), from memory: slope (N - 1)/(2N) for death-birth and
    // birth-death (references.md §1.1); haploid Wright-Fisher (N - 1)/N (references.md §5.4).
    for n in [2u64, 7, 20] {
        let nf = n as f64;
        for (rule, want) in [
            (Rule::DeathBirth, (nf - 1.0) / (2.0 * nf)),
            (Rule::BirthDeath, (nf - 1.0) / (2.0 * nf)),
            (Rule::WrightFisher, (nf - 1.0) / nf),
        ] {
            let model = build(&[n], &[vec![1.0]], rule, Scope::Deme);
            let weak = weak::first_order(&model).unwrap();
            assert!((weak.slope[0] - want).abs() < 1e-13, "{rule:?} N={n}");
            // ... and the central difference of the well-mixed reference agrees.
            let fd =
                richardson(|s| vec![well_mixed::reference(rule, n, s).fixation_probability])[0];
            assert!(
                (weak.slope[0] - fd).abs() < SLOPE_TOLERANCE * fd,
                "{rule:?} N={n}: {fd}"
            );
        }
    }
}

#[test]
fn the_matrix_free_solver_matches_finite_differences_of_the_exact_chain() {
    // The iterative (deflated, matrix-free) pair solver on the island models above, against
    // the exact chain, with the same tolerance as the dense solver.
    let config = WeakConfig {
        solver: PairSolver::Iterative,
        ..WeakConfig::default()
    };
    for (sizes, rows) in [two_demes(), three_demes(), (vec![1, 4, 2], three_demes().1)] {
        for (rule, scope) in [
            (Rule::DeathBirth, Scope::Deme),
            (Rule::DeathBirth, Scope::Neighbourhood),
            (Rule::WrightFisher, Scope::Deme),
            (Rule::WrightFisher, Scope::Neighbourhood),
            (Rule::BirthDeath, Scope::Deme),
        ] {
            let model = build(&sizes, &rows, rule, scope);
            let solved = weak::first_order_with(&model, &config).unwrap();
            assert_eq!(solved.info.solver, PairSolver::Iterative);
            let fd = richardson(|s| exact_rho(&model, s));
            let neutral = exact_rho(&model, 0.0);
            for k in 0..model.demes() {
                let weak = &solved.coefficients;
                assert!((weak.neutral[k] - neutral[k]).abs() < 1e-11);
                assert!(
                    (weak.slope[k] - fd[k]).abs() <= SLOPE_TOLERANCE * fd[k].abs(),
                    "{rule:?} {scope:?} {sizes:?} deme {k}: {} vs {}",
                    weak.slope[k],
                    fd[k]
                );
            }
        }
    }
}
