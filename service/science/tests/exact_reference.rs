//! The exact method against published closed forms and check values (references.md) and
//! against exact identities of the model.

mod common;
use common::{complete, cycle, star};
use demefix_science::exact::{self, ExactConfig, ExactError, SolverChoice};
use demefix_science::reach;
use demefix_science::start::{self, DemeAnswer};
use demefix_science::{Model, Population, Rule, Scope, Start, StochasticMatrix};
use proptest::prelude::*;
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn model(sizes: &[u64], rows: &[Vec<f64>], rule: Rule, scope: Scope, s: f64) -> Model {
    let pop = Population::new(sizes.to_vec()).unwrap();
    let kernel = StochasticMatrix::from_weights(rows).unwrap();
    Model::new(&pop, kernel, rule, scope, s).unwrap()
}

fn well_mixed(n: u64, rule: Rule, s: f64) -> Model {
    model(&[n], &[vec![1.0]], rule, Scope::Deme, s)
}

fn solve(m: &Model) -> Vec<DemeAnswer> {
    exact::solve(m, &ExactConfig::default()).unwrap().per_deme
}

fn solve_with(m: &Model, solver: SolverChoice) -> exact::ExactSolution {
    let config = ExactConfig {
        solver,
        ..ExactConfig::default()
    };
    exact::solve(m, &config).unwrap()
}

fn assert_close(got: f64, want: f64, tol: f64, what: &str) {
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got:.15}, want {want:.15} (tolerance {tol:e})"
    );
}

/// Moran fixation probability of one variant, `(1 - 1/r) / (1 - 1/r^N)`.
fn moran(r: f64, n: u64) -> f64 {
    if r == 1.0 {
        1.0 / n as f64
    } else {
        (1.0 - 1.0 / r) / (1.0 - r.powi(-(n as i32)))
    }
}

#[test]
fn one_deme_event_rules_match_the_moran_fixation_table() {
    // Moran P.A.P. (1958) Math. Proc. Camb. Phil. Soc. 54:60-71 (from memory); check values of
    // references.md section 1.1, 12 decimals.
    let table: [(u64, [f64; 4]); 2] = [
        (
            5,
            [
                0.160215867744,
                0.203999801600,
                0.239815891632,
                0.516129032258,
            ],
        ),
        (
            10,
            [
                0.059482214754,
                0.104536709457,
                0.147950358984,
                0.500488758553,
            ],
        ),
    ];
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        for (n, row) in table {
            for (r, want) in [0.9, 1.01, 1.1, 2.0].into_iter().zip(row) {
                let got = solve(&well_mixed(n, rule, r - 1.0))[0].fixation_probability;
                assert_close(got, want, 1e-11, &format!("{rule:?} N={n} r={r}"));
                assert_close(got, moran(r, n), 1e-12, "closed form");
            }
        }
    }
}

#[test]
fn near_certain_fixation_stays_a_probability() {
    // Strong selection puts the answer within round-off of 1 (1 - 1/r); the linear solve's
    // round-off must not carry it above 1 (it did, by 1.3e-15, for one deme of 1,680). Found
    // by the schemathesis run of tests/openapi_conformance.rs (Result.fixation_probability
    // has maximum 1).
    let sizes_and_rows: [(&[u64], Vec<Vec<f64>>); 2] = [
        (&[1680], vec![vec![1.0]]),
        (&[40, 30], vec![vec![0.9, 0.1], vec![0.3, 0.7]]),
    ];
    for (sizes, rows) in &sizes_and_rows {
        for rule in [Rule::DeathBirth, Rule::BirthDeath] {
            for s in [3.0, 1e6, 5.3e15, 4.4e16, 4e118] {
                let m = model(sizes, rows, rule, Scope::Deme, s);
                let per_deme = solve(&m);
                let mut answers = per_deme.clone();
                for start in [Start::Uniform, Start::AtBirth] {
                    answers.push(start::combine(&start.deme_weights(&m), &per_deme));
                }
                for a in answers {
                    let p = a.fixation_probability;
                    assert!(
                        (0.0..=1.0).contains(&p),
                        "{rule:?} sizes {sizes:?} s={s}: fixation probability {p:e}"
                    );
                }
                if sizes.len() == 1 {
                    let p = per_deme[0].fixation_probability;
                    assert_close(p, moran(1.0 + s, sizes[0]), 1e-12, "closed form");
                }
            }
        }
    }
}

#[test]
fn one_deme_times_match_the_moran_time_table_in_generations() {
    // Antal & Scheuring (2006) Bull. Math. Biol. 68:1923-1944 and Ewens (2004) Mathematical
    // Population Genetics I (formulas from memory); check values of references.md section 1.2,
    // N = 10, in Moran steps (we report generations = steps / N).
    let n = 10u64;
    let table = [
        (1.0, 28.28968254, 90.0),
        (1.1, 30.58253088, 88.84410332),
        (2.0, 34.88018433, 60.26938742),
    ];
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        for (r, t_abs, t_fix) in table {
            let a = solve(&well_mixed(n, rule, r - 1.0))[0];
            let steps = n as f64;
            assert_close(a.mean_absorption_generations * steps, t_abs, 1e-7, "t_1");
            assert_close(a.mean_fixation_generations * steps, t_fix, 1e-7, "t_1^A");
        }
        // Neutral closed forms (Ewens 2004, from memory): t_1 = N H_{N-1}, t_1^A = N (N - 1).
        let a = solve(&well_mixed(n, rule, 0.0))[0];
        let harmonic: f64 = (1..n).map(|j| 1.0 / j as f64).sum();
        assert_close(a.mean_absorption_generations, harmonic, 1e-10, "H_{N-1}");
        assert_close(a.mean_fixation_generations, (n - 1) as f64, 1e-10, "N - 1");
    }
}

#[test]
fn haploid_wright_fisher_matches_the_exact_chain_values() {
    // Exact haploid Wright-Fisher chain values of references.md section 2.1 ("exact WF"
    // column, maintainers' computation beside Kimura M. (1962) Genetics 47:713-719), 10 decimals.
    let cases = [
        (10, 0.01, 0.1091946832),
        (10, 0.1, 0.2045854730),
        (50, 0.01, 0.0312698318),
        (50, 0.1, 0.1755535113),
    ];
    for (n, s, want) in cases {
        let sol = exact::solve(
            &well_mixed(n, Rule::WrightFisher, s),
            &ExactConfig::default(),
        )
        .unwrap();
        assert_eq!(sol.report.solver, "dense_lu");
        assert_close(
            sol.per_deme[0].fixation_probability,
            want,
            1e-10,
            &format!("WF N={n} s={s}"),
        );
    }
    // Times, N = 10, s = 0.1 (references.md section 2.1): 6.701062 and 16.639255 generations.
    let a = solve(&well_mixed(10, Rule::WrightFisher, 0.1))[0];
    assert_close(a.mean_absorption_generations, 6.701062, 1e-6, "WF t");
    assert_close(a.mean_fixation_generations, 16.639255, 1e-6, "WF t^A");
}

/// Example B of references.md section 3: sizes (2, 3, 4) and flows `n_i F_ij`.
fn example_b_rows() -> Vec<Vec<f64>> {
    vec![
        vec![0.8, 0.7, 0.5],
        vec![0.6, 1.4, 1.0],
        vec![0.6, 0.9, 2.5],
    ]
}

#[test]
fn conservative_birth_death_fixes_as_moran_from_every_deme() {
    // Maruyama (1970, 1974) invariance, exact for birth-death with conservative dispersal by the
    // circulation theorem of Lieberman, Hauert & Nowak (2005) Nature 433:312-316 (from memory);
    // references.md section 3, Example B: 0.157855035522 (r = 1.1), 0.500978473581 (r = 2).
    for (r, want) in [(1.1, 0.157855035522), (2.0, 0.500978473581)] {
        let m = model(
            &[2, 3, 4],
            &example_b_rows(),
            Rule::BirthDeath,
            Scope::Deme,
            r - 1.0,
        );
        for (deme, a) in solve(&m).iter().enumerate() {
            assert_close(a.fixation_probability, want, 1e-11, &format!("deme {deme}"));
            assert_close(a.fixation_probability, moran(r, 9), 1e-12, "Moran(9)");
        }
    }
}

#[test]
fn conservative_recruitment_breaks_the_invariance_for_death_birth_and_wright_fisher() {
    // references.md section 3 (Slatkin M. (1981) Evolution 35:477-488 on Maruyama's
    // conditions; values computed by the maintainers): Example B's matrix as backward M.
    let cases = [
        (
            Rule::DeathBirth,
            1.1,
            [0.14333742161, 0.145208882711, 0.146541928642],
        ),
        (
            Rule::DeathBirth,
            2.0,
            [0.365679177215, 0.393186935146, 0.414100197879],
        ),
        (
            Rule::WrightFisher,
            1.1,
            [0.180702694878, 0.183771175829, 0.185968320424],
        ),
        (
            Rule::WrightFisher,
            2.0,
            [0.58361271297, 0.633036385937, 0.668679966734],
        ),
    ];
    for (rule, r, want) in cases {
        let m = model(&[2, 3, 4], &example_b_rows(), rule, Scope::Deme, r - 1.0);
        for (deme, (a, w)) in solve(&m).iter().zip(want).enumerate() {
            assert_close(
                a.fixation_probability,
                w,
                1e-10,
                &format!("{rule:?} r={r} deme {deme}"),
            );
        }
    }
}

/// Birth-death star closed form (Broom & Rychtar (2008) Proc. R. Soc. A 464:2609-2627, form as
/// derived in references.md section 4.2): `(P_L, P_C)`.
fn bd_star(n: usize, r: f64) -> (f64, f64) {
    let nf = n as f64;
    let gamma = (nf + r) / (r * (1.0 + r * nf));
    let pl = (1.0 - gamma)
        / (1.0 - gamma.powi(n as i32) + (1.0 - gamma) * gamma.powi(n as i32 - 1) / (r * nf));
    let pc = pl * (r * nf + 1.0) / (nf * (r + nf));
    (pl, pc)
}

#[test]
fn birth_death_on_a_star_matches_the_exact_star_formula() {
    // Broom M. & Rychtar J. (2008) Proc. R. Soc. A 464(2098):2609-2627, closed form of
    // references.md section 4.2, and its table (12 decimals) for n = 5 and 10.
    let table = [
        (5, 1.1, 0.226968174373, 0.089930786072),
        (5, 2.0, 0.605447482950, 0.292958459492),
        (10, 1.1, 0.176936590632, 0.036428121601),
        (10, 2.0, 0.660716381480, 0.178571994995),
    ];
    for (n, r, uniform_want, temperature_want) in table {
        let m = model(
            &vec![1; n + 1],
            &star(n),
            Rule::BirthDeath,
            Scope::Deme,
            r - 1.0,
        );
        let per_deme = solve(&m);
        let (pl, pc) = bd_star(n, r);
        assert_close(per_deme[0].fixation_probability, pc, 1e-12, "P_C");
        for leaf in &per_deme[1..] {
            assert_close(leaf.fixation_probability, pl, 1e-12, "P_L");
        }
        let uniform = start::combine(&Start::Uniform.deme_weights(&m), &per_deme);
        let temperature = start::combine(&Start::AtBirth.deme_weights(&m), &per_deme);
        assert_close(uniform.fixation_probability, uniform_want, 1e-11, "uniform");
        assert_close(
            temperature.fixation_probability,
            temperature_want,
            1e-11,
            "temperature",
        );
    }
}

#[test]
fn birth_death_star_times_match_the_table() {
    // references.md section 4.2, star n = 5 under birth-death, in steps (maintainers' exact
    // computation; cf. Hindersin & Traulsen (2014) J. R. Soc. Interface 11:20140606):
    // (r, T_abs centre, T_abs leaf, T_fix centre, T_fix leaf).
    let table = [
        (1.0, 11.41666667, 57.08333333, 107.57051282, 111.57051282),
        (1.1, 12.76956127, 59.91871060, 106.93900085, 110.63130854),
        (2.0, 19.16107213, 60.96704768, 78.19285744, 80.37467562),
    ];
    for (r, abs_c, abs_l, fix_c, fix_l) in table {
        let m = model(&[1; 6], &star(5), Rule::BirthDeath, Scope::Deme, r - 1.0);
        let a = solve(&m);
        let steps = 6.0;
        assert_close(
            a[0].mean_absorption_generations * steps,
            abs_c,
            1e-7,
            "abs centre",
        );
        assert_close(
            a[1].mean_absorption_generations * steps,
            abs_l,
            1e-7,
            "abs leaf",
        );
        assert_close(
            a[0].mean_fixation_generations * steps,
            fix_c,
            1e-7,
            "fix centre",
        );
        assert_close(
            a[1].mean_fixation_generations * steps,
            fix_l,
            1e-7,
            "fix leaf",
        );
    }
}

#[test]
fn death_birth_on_a_star_matches_the_exact_star_formula() {
    // Hadjichrysanthou, Broom & Rychtar (2011) Dyn. Games Appl. 1:386-407, closed form as given
    // in references.md section 4.3: P_L = r(rn+1) / (n(r+1)(n+2r-1)), P_C = (rn+1)/((n+1)(r+1)).
    let table = [
        (3, 1.1, 0.262046485261),
        (5, 2.0, 0.254629629630),
        (10, 2.0, 0.155753337572),
    ];
    for (n, r, uniform_want) in table {
        let m = model(
            &vec![1; n + 1],
            &star(n),
            Rule::DeathBirth,
            Scope::Neighbourhood,
            r - 1.0,
        );
        let per_deme = solve(&m);
        let nf = n as f64;
        let pl = r * (r * nf + 1.0) / (nf * (r + 1.0) * (nf + 2.0 * r - 1.0));
        let pc = (r * nf + 1.0) / ((nf + 1.0) * (r + 1.0));
        assert_close(per_deme[0].fixation_probability, pc, 1e-12, "DB P_C");
        for leaf in &per_deme[1..] {
            assert_close(leaf.fixation_probability, pl, 1e-12, "DB P_L");
        }
        let uniform = start::combine(&Start::Uniform.deme_weights(&m), &per_deme);
        assert_close(
            uniform.fixation_probability,
            uniform_want,
            1e-11,
            "DB uniform",
        );
    }
    // DB star n = 5 from the centre: T_abs = n H_n = 11.41666667 steps for every r
    // (references.md section 4.3).
    for r in [1.0, 2.0] {
        let m = model(
            &[1; 6],
            &star(5),
            Rule::DeathBirth,
            Scope::Neighbourhood,
            r - 1.0,
        );
        let a = solve(&m)[0];
        assert_close(
            a.mean_absorption_generations * 6.0,
            137.0 / 12.0,
            1e-10,
            "n H_n",
        );
    }
}

#[test]
fn death_birth_on_a_cycle_and_a_complete_graph_match_their_closed_forms() {
    // Cycle: references.md section 4.3 closed form (cf. Hindersin & Traulsen (2015) PLoS
    // Comput. Biol. 11(11):e1004437), rho = 1 / [1 + r^-(N-2) + (1+r)(1 - r^-(N-2)) / (2(r-1))];
    // values N=5: 0.229225867562 (r=1.1), 0.410256410256 (r=2).
    let cycle_rho = |n: usize, r: f64| {
        let a = r.powi(-(n as i32 - 2));
        1.0 / (1.0 + a + (1.0 + r) * (1.0 - a) / (2.0 * (r - 1.0)))
    };
    for n in [5usize, 6, 8] {
        for r in [1.1, 2.0] {
            let m = model(
                &vec![1; n],
                &cycle(n),
                Rule::DeathBirth,
                Scope::Neighbourhood,
                r - 1.0,
            );
            for a in solve(&m) {
                assert_close(a.fixation_probability, cycle_rho(n, r), 1e-12, "cycle");
            }
        }
    }
    assert_close(cycle_rho(5, 1.1), 0.229225867562, 1e-12, "cycle table");
    // Complete graph without self-loops: ((N-1)/N) Moran(N-1) (references.md section 4.3,
    // recalled from Kaveh, Komarova & Kohandel (2015) R. Soc. Open Sci. 2:140465, from memory);
    // values N=5: 0.229433311786 (r=1.1), 0.426666666667 (r=2).
    for (n, r, want) in [
        (5usize, 1.1, 0.229433311786),
        (5, 2.0, 0.426666666667),
        (10, 2.0, 0.450880626223),
    ] {
        let m = model(
            &vec![1; n],
            &complete(n),
            Rule::DeathBirth,
            Scope::Neighbourhood,
            r - 1.0,
        );
        let formula = (n as f64 - 1.0) / n as f64 * moran(r, n as u64 - 1);
        for a in solve(&m) {
            assert_close(a.fixation_probability, formula, 1e-12, "K_N");
            assert_close(a.fixation_probability, want, 1e-11, "K_N table");
        }
    }
}

fn random_rows(rng: &mut ChaCha8Rng, m: usize) -> Vec<Vec<f64>> {
    (0..m)
        .map(|_| (0..m).map(|_| rng.random_range(0.05..1.0)).collect())
        .collect()
}

#[test]
fn neutral_fixation_from_a_deme_is_its_reproductive_value_per_individual() {
    // Neutral martingale sum_i nu_i k_i / n_i (references.md section 5.1, "exact for DB and WF
    // with backward M"; common practice): fixation from deme k is nu_k / n_k for any sizes.
    let mut rng = ChaCha8Rng::seed_from_u64(20240601);
    for trial in 0..6 {
        let m = 2 + trial % 3;
        let sizes: Vec<u64> = (0..m).map(|_| rng.random_range(1..6)).collect();
        let rows = random_rows(&mut rng, m);
        for (rule, scope) in [
            (Rule::DeathBirth, Scope::Deme),
            (Rule::DeathBirth, Scope::Neighbourhood),
            (Rule::WrightFisher, Scope::Deme),
        ] {
            let mdl = model(&sizes, &rows, rule, scope, 0.0);
            let nu = mdl.kernel().stationary();
            for (k, a) in solve(&mdl).iter().enumerate() {
                assert_close(
                    a.fixation_probability,
                    nu[k] / sizes[k] as f64,
                    1e-10,
                    &format!("{rule:?} {scope:?} sizes {sizes:?} deme {k}"),
                );
            }
        }
    }
}

#[test]
fn fixation_from_a_deme_that_cannot_reach_all_others_is_exactly_zero() {
    // Common practice: a lineage that cannot spread to every deme cannot fix.
    // Deme 0 recruits only from itself; deme 1 from both; deme 2 from deme 1 only.
    let rows = vec![
        vec![1.0, 0.0, 0.0],
        vec![0.4, 0.6, 0.0],
        vec![0.0, 0.7, 0.3],
    ];
    for (rule, s) in [
        (Rule::DeathBirth, 0.3),
        (Rule::WrightFisher, 0.3),
        (Rule::DeathBirth, 0.0),
    ] {
        let m = model(&[3, 4, 2], &rows, rule, Scope::Deme, s);
        let unreachable = reach::unreachable_from_each(&m);
        assert!(unreachable[0].is_empty());
        assert!(!unreachable[1].is_empty() && !unreachable[2].is_empty());
        for solver in [SolverChoice::Direct, SolverChoice::Iterative] {
            let sol = solve_with(&m, solver);
            assert!(sol.per_deme[0].fixation_probability > 0.0);
            assert_eq!(sol.per_deme[1].fixation_probability, 0.0);
            assert_eq!(sol.per_deme[2].fixation_probability, 0.0);
            assert!(sol.per_deme[1].mean_fixation_generations.is_nan());
            assert!(sol.per_deme[2].mean_absorption_generations.is_finite());
        }
    }
    // Isolated demes (identity matrix): every state with all demes monomorphic is frozen, and
    // no deme can fix the whole population; absorption (into a frozen state) still happens.
    let isolated = vec![vec![1.0, 0.0], vec![0.0, 1.0]];
    let m = model(&[3, 4], &isolated, Rule::DeathBirth, Scope::Deme, 0.0);
    let a = solve(&m);
    for answer in &a {
        assert_eq!(answer.fixation_probability, 0.0);
        assert!(answer.mean_absorption_generations > 0.0);
    }
    // Neutral, deme 0 alone (size 3, one variant): time to absorption of a Moran deme of 3 in
    // which only deme-0 deaths (probability 3/7 per event) count: 3 H_2 events x 7/3, / N = 7.
    assert_close(
        a[0].mean_absorption_generations,
        1.5,
        1e-12,
        "isolated deme",
    );
}

#[test]
fn direct_and_iterative_solvers_agree() {
    // Common practice: two solvers of the same system agree to their tolerance.
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let rows = random_rows(&mut rng, 3);
    for rule in [Rule::DeathBirth, Rule::BirthDeath] {
        let m = model(&[9, 14, 19], &rows, rule, Scope::Deme, 0.05);
        let direct = solve_with(&m, SolverChoice::Direct);
        let iterative = solve_with(&m, SolverChoice::Iterative);
        assert_eq!(direct.report.solver, "sparse_lu");
        assert_eq!(iterative.report.solver, "bicgstab_two_level_ilu0");
        assert_eq!(direct.report.states, 3000);
        assert!(direct.report.relative_residual < 1e-12);
        assert!(iterative.report.relative_residual <= 1e-8);
        assert!(iterative.report.iterations.unwrap() > 0);
        for (d, i) in direct.per_deme.iter().zip(&iterative.per_deme) {
            let rel = |a: f64, b: f64| (a - b).abs() / b.abs();
            assert!(rel(i.fixation_probability, d.fixation_probability) < 1e-8);
            assert!(rel(i.mean_absorption_generations, d.mean_absorption_generations) < 1e-8);
            assert!(rel(i.mean_fixation_generations, d.mean_fixation_generations) < 1e-8);
        }
    }
}

#[test]
fn too_large_a_chain_is_refused_with_its_size() {
    let m = model(
        &[99, 99, 99],
        &complete(3),
        Rule::WrightFisher,
        Scope::Deme,
        0.1,
    );
    assert_eq!(
        exact::check_size(&m, &ExactConfig::default()),
        Err(ExactError::TooManyStates {
            states: Some(1_000_000),
            limit: 3_000
        })
    );
    let m = model(
        &[99, 99, 99],
        &complete(3),
        Rule::DeathBirth,
        Scope::Deme,
        0.1,
    );
    assert_eq!(
        exact::check_size(&m, &ExactConfig::default()),
        Ok(1_000_000)
    );
    let huge = model(
        &[u64::MAX / 2, 3],
        &complete(2),
        Rule::BirthDeath,
        Scope::Deme,
        0.1,
    );
    assert!(matches!(
        exact::solve(&huge, &ExactConfig::default()),
        Err(ExactError::TooManyStates { states: None, .. })
    ));
}

fn small_model() -> impl Strategy<Value = (Vec<u64>, Vec<Vec<f64>>, usize, bool, f64)> {
    (1usize..=3).prop_flat_map(|m| {
        (
            prop::collection::vec(1u64..=4, m),
            prop::collection::vec(prop::collection::vec(0.0f64..1.0, m), m),
            0usize..3,
            any::<bool>(),
            -0.5f64..1.5,
        )
    })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn fixation_probabilities_are_probabilities_and_neutral_uniform_start_gives_one_over_n(
        (sizes, mut rows, rule, neighbourhood, s) in small_model()
    ) {
        // Common practice: probabilities lie in [0, 1]; under neutrality every individual is
        // equally likely to be the common ancestor, so the uniform start fixes with 1/N.
        for (i, row) in rows.iter_mut().enumerate() {
            row[i] += 0.1;
            // Keep the spread graph strongly connected: every row draws from its successor.
            let next = (i + 1) % row.len();
            row[next] += 0.05;
        }
        let rule = [Rule::DeathBirth, Rule::BirthDeath, Rule::WrightFisher][rule];
        let scope = if neighbourhood { Scope::Neighbourhood } else { Scope::Deme };
        let m = model(&sizes, &rows, rule, scope, s);
        for a in solve(&m) {
            prop_assert!((0.0..=1.0).contains(&a.fixation_probability));
        }
        let neutral = m.with_selection(0.0).unwrap();
        let per_deme = solve(&neutral);
        let uniform = start::combine(&Start::Uniform.deme_weights(&neutral), &per_deme);
        prop_assert!(
            (uniform.fixation_probability - 1.0 / neutral.total() as f64).abs() < 1e-10,
            "{:?}", uniform
        );
    }
}
