//! Well-mixed references: the Moran and haploid Wright-Fisher fixation probabilities of an
//! unstructured population of the same total size.
//!
//! This module owns the closed forms (and the one small exact chain) that every structured
//! result is compared with:
//!
//! * death-birth and birth-death: the Moran fixation probability
//!   `rho = (1 - 1/r) / (1 - 1/r^N)`, `r = 1 + s`, evaluated through `ln_1p` / `expm1` so that
//!   it stays accurate for `r` near 1 and never overflows (`N = 10^9`, `s = ±0.5` included);
//! * Wright-Fisher: the exact haploid Wright-Fisher chain (`p' = r i / (r i + N - i)`,
//!   `i' ~ Binomial(N, p')`) solved as a dense linear system for `N <=`
//!   [`WRIGHT_FISHER_EXACT_MAX`], and Kimura's haploid diffusion
//!   `(1 - e^{-2 s}) / (1 - e^{-2 N s})` (initial frequency `1/N`) above it.
//!
//! The signature of [`reference`] is a contract.

use crate::model::Rule;
use faer::prelude::*;
use faer::Mat;

/// Largest total size for which the Wright-Fisher reference is the exact chain; above it the
/// reference is Kimura's diffusion. At this size the dense solve takes a few milliseconds and
/// Kimura's formula is within about 3% of the chain for `|s| <= 0.1`.
pub const WRIGHT_FISHER_EXACT_MAX: u64 = 400;

/// The fixation probability of one variant in a well-mixed population of the same total size.
#[derive(Debug, Clone, PartialEq)]
pub struct WellMixedReference {
    /// Fixation probability of a single variant.
    pub fixation_probability: f64,
    /// Which formula gave it: `moran`, `wright_fisher_exact` or `kimura_diffusion`.
    pub method: &'static str,
}

/// Reference for `rule` with total size `total` and selection coefficient `s`.
///
/// Death-birth and birth-death give the Moran value (`method = "moran"`); Wright-Fisher gives
/// the exact chain for `total <=` [`WRIGHT_FISHER_EXACT_MAX`] (`"wright_fisher_exact"`) and
/// Kimura's haploid diffusion above (`"kimura_diffusion"`). The fixation probability is NaN
/// when `total == 0` or `s` is not a finite number greater than `-1`.
pub fn reference(rule: Rule, total: u64, s: f64) -> WellMixedReference {
    let valid = total > 0 && s.is_finite() && s > -1.0;
    match rule {
        Rule::DeathBirth | Rule::BirthDeath => WellMixedReference {
            fixation_probability: if valid {
                moran_fixation_from(1, total, 1.0 + s)
            } else {
                f64::NAN
            },
            method: "moran",
        },
        Rule::WrightFisher if total <= WRIGHT_FISHER_EXACT_MAX => WellMixedReference {
            fixation_probability: if valid {
                wright_fisher_exact(total, s)
            } else {
                f64::NAN
            },
            method: "wright_fisher_exact",
        },
        Rule::WrightFisher => WellMixedReference {
            fixation_probability: if valid {
                kimura_haploid(total, s)
            } else {
                f64::NAN
            },
            method: "kimura_diffusion",
        },
    }
}

/// Moran fixation probability from `i` variants out of `total`, fitness `r`:
/// `(1 - r^{-i}) / (1 - r^{-N})`, and `i / N` at `r = 1`.
///
/// Evaluated as a ratio of `expm1` terms in `ln r` (taken as `ln_1p(r - 1)`), arranged so that
/// no exponential overflows: for `r > 1`, `expm1(-i L) / expm1(-N L)`; for `r < 1`,
/// `e^{(N - i) L} expm1(i L) / expm1(N L)`. `i` is clamped to `total`; NaN when `total == 0` or
/// `r` is not a positive finite number.
pub fn moran_fixation_from(i: u64, total: u64, r: f64) -> f64 {
    if total == 0 || !r.is_finite() || r <= 0.0 {
        return f64::NAN;
    }
    let i = i.min(total);
    if i == 0 {
        return 0.0;
    }
    if i == total {
        return 1.0;
    }
    let (fi, fnn) = (i as f64, total as f64);
    let l = (r - 1.0).ln_1p();
    if l == 0.0 {
        return fi / fnn;
    }
    if l > 0.0 {
        // Both expm1 values lie in (-1, 0).
        (-fi * l).exp_m1() / (-fnn * l).exp_m1()
    } else {
        // l < 0: the same ratio multiplied through by e^{N L} (which may underflow to 0, the
        // correct limit).
        ((fnn - fi) * l).exp() * (fi * l).exp_m1() / (fnn * l).exp_m1()
    }
}

/// Kimura's haploid diffusion fixation probability from one variant,
/// `(1 - e^{-2 N s p}) / (1 - e^{-2 N s})` with `p = 1/N` (and `1/N` at `s = 0`).
fn kimura_haploid(total: u64, s: f64) -> f64 {
    if total == 1 {
        return 1.0;
    }
    let n = total as f64;
    if s == 0.0 {
        return 1.0 / n;
    }
    if s > 0.0 {
        (-2.0 * s).exp_m1() / (-2.0 * n * s).exp_m1()
    } else {
        (2.0 * (n - 1.0) * s).exp() * (2.0 * s).exp_m1() / (2.0 * n * s).exp_m1()
    }
}

/// Exact haploid Wright-Fisher fixation probability from one variant: the absorption
/// probabilities `h` of the chain `i -> Binomial(N, r i / (r i + N - i))` solve
/// `(I - Q) h = P_{., N}` over the transient counts `1..N-1`.
fn wright_fisher_exact(total: u64, s: f64) -> f64 {
    if total == 1 {
        return 1.0;
    }
    if s == 0.0 {
        return 1.0 / total as f64;
    }
    let n = total as usize;
    let r = 1.0 + s;
    let transient = n - 1;
    let mut a = Mat::<f64>::zeros(transient, transient);
    let mut b = Mat::<f64>::zeros(transient, 1);
    let mut pmf = vec![0.0f64; n + 1];
    for i in 1..n {
        let (mutant, resident) = (r * i as f64, (n - i) as f64);
        let p = mutant / (mutant + resident);
        binomial_pmf(n, p, &mut pmf);
        let row = i - 1;
        a[(row, row)] = 1.0;
        for (j, &v) in pmf.iter().enumerate().take(n).skip(1) {
            a[(row, j - 1)] -= v;
        }
        b[(row, 0)] = pmf[n];
    }
    let h = a.partial_piv_lu().solve(&b);
    h[(0, 0)]
}

/// Binomial(`n`, `p`) probabilities of `0..=n` into `out` (length `n + 1`), `0 < p < 1`.
///
/// Built by the ratio recurrence outward from the mode, which is set to 1, then normalised by
/// the sum: every value carries a relative error of a few hundred ulps at most, where
/// `exp(ln n! - ...)` would lose `ln n!` times an ulp.
fn binomial_pmf(n: usize, p: f64, out: &mut [f64]) {
    let ratio = p / (1.0 - p);
    let mode = (((n + 1) as f64 * p).floor() as usize).min(n);
    out[mode] = 1.0;
    for j in mode..n {
        // P(j + 1) / P(j) = (n - j) / (j + 1) * p / q
        out[j + 1] = out[j] * ((n - j) as f64 / (j + 1) as f64) * ratio;
    }
    for j in (0..mode).rev() {
        // P(j) / P(j + 1) = (j + 1) / (n - j) * q / p
        out[j] = out[j + 1] * ((j + 1) as f64 / (n - j) as f64) / ratio;
    }
    let sum: f64 = out.iter().sum();
    out.iter_mut().for_each(|v| *v /= sum);
}

#[cfg(test)]
mod tests {
    use super::*;

    fn moran(n: u64, r: f64) -> f64 {
        reference(Rule::DeathBirth, n, r - 1.0).fixation_probability
    }

    #[test]
    fn moran_matches_the_reference_table() {
        // Moran (1958), Math. Proc. Camb. Phil. Soc. 54:60-71, and Nowak (2006) Evolutionary
        // Dynamics ch. 6 (both from memory); values from references.md §1.1.
        let table: [(u64, [f64; 4]); 5] = [
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
                6,
                [
                    0.126022549988,
                    0.170839967040,
                    0.208733982148,
                    0.507936507937,
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
            (
                11,
                [
                    0.050813731327,
                    0.095499084863,
                    0.139966492750,
                    0.500244259893,
                ],
            ),
            (
                100,
                [
                    0.000002951345,
                    0.015708656560,
                    0.090915688271,
                    0.500000000000,
                ],
            ),
        ];
        for (n, row) in table {
            for (r, want) in [0.9, 1.01, 1.1, 2.0].into_iter().zip(row) {
                let got = moran(n, r);
                assert!((got - want).abs() < 1e-11, "N={n} r={r}: {got} vs {want}");
            }
        }
        // rho_3 (N = 10, r = 2), references.md §1.1 (same sources).
        assert!((moran_fixation_from(3, 10, 2.0) - 0.8758553274682).abs() < 1e-12);
    }

    #[test]
    fn both_event_rules_use_moran() {
        let db = reference(Rule::DeathBirth, 10, 0.1);
        let bd = reference(Rule::BirthDeath, 10, 0.1);
        assert_eq!(db, bd);
        assert_eq!(db.method, "moran");
    }

    #[test]
    fn moran_is_neutral_and_continuous_at_r_one() {
        // Neutral fixation probability i/N: common practice (martingale argument).
        assert_eq!(moran_fixation_from(1, 10, 1.0), 0.1);
        assert_eq!(moran_fixation_from(4, 10, 1.0), 0.4);
        for eps in [1e-9, -1e-9, 1e-13, -1e-13] {
            let got = moran_fixation_from(1, 10, 1.0 + eps);
            // Weak-selection slope (N - 1)/(2N) (references.md §1.1 identity).
            let want = 0.1 + eps * 0.45;
            assert!((got - want).abs() < 1e-13, "{eps}: {got}");
        }
    }

    #[test]
    fn moran_stays_finite_for_a_billion_individuals() {
        let n = 1_000_000_000;
        // Large-N limit 1 - 1/r for r > 1 (references.md §2.2 note; Nowak 2006, from memory).
        let up = moran(n, 1.5);
        assert!((up - (1.0 - 1.0 / 1.5)).abs() < 1e-15, "{up}");
        let down = moran(n, 0.5);
        assert_eq!(down, 0.0);
        let tiny = moran(n, 1.0 + 1e-12);
        // N s = 1e-3: rho ~ (1/N)(1 + N s / 2).
        assert!((tiny * n as f64 - 1.0005).abs() < 1e-6, "{tiny}");
        assert!(moran_fixation_from(n / 2, n, 0.5).is_finite());
        assert_eq!(moran_fixation_from(n / 2, n, 0.5), 0.0);
    }

    #[test]
    fn moran_from_several_variants_is_monotone_and_bounded() {
        for r in [0.5, 0.9, 1.0, 1.1, 3.0] {
            let mut last = 0.0;
            for i in 0..=20 {
                let p = moran_fixation_from(i, 20, r);
                assert!((0.0..=1.0).contains(&p) && p >= last, "r={r} i={i}: {p}");
                last = p;
            }
            assert_eq!(last, 1.0);
        }
    }

    #[test]
    fn wright_fisher_matches_the_exact_and_kimura_columns() {
        // Kimura (1962), Genetics 47:713-719, haploid form (from memory/derived), and the exact
        // haploid Wright-Fisher chain; values from references.md §2.1.
        let cases = [
            (10, 0.01, 0.1092370991, 0.1091946832),
            (10, 0.1, 0.2096410822, 0.2045854730),
            (50, 0.01, 0.0313252376, 0.0312698318),
            (50, 0.1, 0.1812774769, 0.1755535113),
            (100, 0.01, 0.0229005837, 0.0228351259),
            (100, 0.1, 0.1812692473, 0.1758367644),
        ];
        for (n, s, kimura, exact) in cases {
            let got = reference(Rule::WrightFisher, n, s);
            assert_eq!(got.method, "wright_fisher_exact");
            assert!(
                (got.fixation_probability - exact).abs() < 1e-9,
                "N={n} s={s}: {}",
                got.fixation_probability
            );
            let k = kimura_haploid(n, s);
            assert!((k - kimura).abs() < 1e-9, "N={n} s={s}: {k}");
        }
        // Deleterious Kimura value, references.md §2.1.
        assert!((kimura_haploid(100, -0.01) - 0.0031618661).abs() < 1e-9);
    }

    #[test]
    fn large_wright_fisher_uses_kimura_and_stays_finite() {
        let big = reference(Rule::WrightFisher, 1_000_000_000, 0.5);
        assert_eq!(big.method, "kimura_diffusion");
        // Kimura (1962) from memory: 1 - e^{-2s} for N s >> 1.
        assert!((big.fixation_probability - (1.0 - (-1.0f64).exp())).abs() < 1e-15);
        assert_eq!(
            reference(Rule::WrightFisher, 1_000_000_000, -0.5).fixation_probability,
            0.0
        );
        let neutral = reference(Rule::WrightFisher, 1_000, 0.0);
        assert_eq!(neutral.fixation_probability, 1e-3);
        let edge = reference(Rule::WrightFisher, WRIGHT_FISHER_EXACT_MAX + 1, 0.0);
        assert_eq!(edge.method, "kimura_diffusion");
    }

    #[test]
    fn exact_wright_fisher_is_neutral_in_the_limit() {
        for n in [2, 7, 40, WRIGHT_FISHER_EXACT_MAX] {
            let got = reference(Rule::WrightFisher, n, 1e-10).fixation_probability;
            // One-deme Wright-Fisher slope (N - 1)/N (references.md §5.4, derived).
            let want = 1.0 / n as f64 + 1e-10 * (n as f64 - 1.0) / n as f64;
            assert!((got - want).abs() < 1e-12, "N={n}: {got} vs {want}");
        }
        assert_eq!(
            reference(Rule::WrightFisher, 1, 0.3).fixation_probability,
            1.0
        );
    }

    #[test]
    fn invalid_inputs_give_nan() {
        assert!(reference(Rule::DeathBirth, 0, 0.1)
            .fixation_probability
            .is_nan());
        assert!(reference(Rule::WrightFisher, 10, -1.0)
            .fixation_probability
            .is_nan());
        assert!(moran_fixation_from(1, 10, f64::NAN).is_nan());
    }
}
