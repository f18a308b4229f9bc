//! Binomial confidence intervals and sample quantiles used to summarise ensembles.
//!
//! * [`wilson`]: the Wilson score interval for `x` successes in `n` trials;
//! * [`fixation_interval`]: an ensemble's 95% interval of a fixation probability;
//! * [`clopper_pearson`]: the exact (Clopper-Pearson) interval from Beta quantiles;
//! * [`quantile`]: linear interpolation between order statistics ("type 7").

use statrs::distribution::{Beta, ContinuousCDF};

/// The two-sided 95% standard normal quantile `Phi^{-1}(0.975)`.
pub const Z95: f64 = 1.959963984540054;

/// Wilson score interval for `x` successes in `n` trials at normal quantile `z`.
///
/// Centre `(x + z^2/2) / (n + z^2)`, half-width `z sqrt(n p (1 - p) + z^2/4) / (n + z^2)`
/// with `p = x / n`; clipped to `[0, 1]`, with the lower end exactly 0 at `x = 0` and the
/// upper end exactly 1 at `x = n`. With `n = 0` nothing is known and the result is `(0, 1)`.
pub fn wilson(x: u64, n: u64, z: f64) -> (f64, f64) {
    assert!(x <= n, "wilson: {x} successes in {n} trials");
    if n == 0 {
        return (0.0, 1.0);
    }
    let nf = n as f64;
    let p = x as f64 / nf;
    let z2 = z * z;
    let centre = (x as f64 + z2 / 2.0) / (nf + z2);
    let half = z * (nf * p * (1.0 - p) + z2 / 4.0).sqrt() / (nf + z2);
    let lower = if x == 0 {
        0.0
    } else {
        (centre - half).max(0.0)
    };
    let upper = if x == n {
        1.0
    } else {
        (centre + half).min(1.0)
    };
    (lower, upper)
}

/// The 95% interval every ensemble reports for a fixation probability from `fixed` fixing
/// and `unresolved` unabsorbed replicates out of `n`: the Wilson lower bound of `fixed / n`
/// and the Wilson upper bound of `(fixed + unresolved) / n` (an unresolved replicate may
/// still fix).
pub fn fixation_interval(fixed: u64, unresolved: u64, n: u64) -> (f64, f64) {
    (
        wilson(fixed, n, Z95).0,
        wilson(fixed + unresolved, n, Z95).1,
    )
}

/// Clopper-Pearson interval for `x` successes in `n` trials at level `1 - alpha`:
/// `[Beta^{-1}(alpha/2; x, n - x + 1), Beta^{-1}(1 - alpha/2; x + 1, n - x)]`, with the lower
/// end 0 at `x = 0` and the upper end 1 at `x = n`. With `n = 0` the result is `(0, 1)`.
pub fn clopper_pearson(x: u64, n: u64, alpha: f64) -> (f64, f64) {
    assert!(x <= n, "clopper_pearson: {x} successes in {n} trials");
    assert!(alpha > 0.0 && alpha < 1.0, "clopper_pearson: alpha {alpha}");
    if n == 0 {
        return (0.0, 1.0);
    }
    let lower = if x == 0 {
        0.0
    } else {
        Beta::new(x as f64, (n - x + 1) as f64)
            .expect("positive shape parameters")
            .inverse_cdf(alpha / 2.0)
    };
    let upper = if x == n {
        1.0
    } else {
        Beta::new((x + 1) as f64, (n - x) as f64)
            .expect("positive shape parameters")
            .inverse_cdf(1.0 - alpha / 2.0)
    };
    (lower, upper)
}

/// The `p`-quantile of ascending `sorted` data by linear interpolation between order
/// statistics: with `h = (len - 1) p`, `x[floor h] + (h - floor h)(x[floor h + 1] - x[floor h])`
/// ("type 7"). `NaN` for empty data; `p` is clamped to `[0, 1]`.
pub fn quantile(sorted: &[f64], p: f64) -> f64 {
    match sorted.len() {
        0 => f64::NAN,
        1 => sorted[0],
        len => {
            let h = (len - 1) as f64 * p.clamp(0.0, 1.0);
            let lo = h.floor() as usize;
            if lo + 1 >= len {
                return sorted[len - 1];
            }
            let frac = h - lo as f64;
            sorted[lo] + frac * (sorted[lo + 1] - sorted[lo])
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Check values: references.md section 7.2, computed with scipy from the formulas of
    // Wilson E.B. (1927) J. Am. Stat. Assoc. 22(158):209-212 and Clopper C.J. & Pearson E.S.
    // (1934) Biometrika 26(4):404-413 (both citations from memory). Tolerance 1e-6 (the sheet
    // gives six decimals).
    /// `(x, n, Wilson interval, Clopper-Pearson interval)`.
    type Case = (u64, u64, (f64, f64), (f64, f64));
    const CASES: [Case; 6] = [
        (7, 50, (0.069508, 0.261862), (0.058192, 0.267396)),
        (0, 20, (0.000000, 0.161125), (0.000000, 0.168433)),
        (20, 20, (0.838875, 1.000000), (0.831567, 1.000000)),
        (1, 10, (0.017876, 0.404150), (0.002529, 0.445016)),
        (50, 1000, (0.038130, 0.065314), (0.037335, 0.065390)),
        (123, 10000, (0.010319, 0.014655), (0.010233, 0.014658)),
    ];

    #[test]
    fn wilson_matches_the_reference_values() {
        for (x, n, want, _) in CASES {
            let got = wilson(x, n, Z95);
            assert!((got.0 - want.0).abs() < 1e-6, "{x}/{n}: {got:?}");
            assert!((got.1 - want.1).abs() < 1e-6, "{x}/{n}: {got:?}");
        }
    }

    #[test]
    fn clopper_pearson_matches_the_reference_values() {
        for (x, n, _, want) in CASES {
            let got = clopper_pearson(x, n, 0.05);
            assert!((got.0 - want.0).abs() < 1e-6, "{x}/{n}: {got:?}");
            assert!((got.1 - want.1).abs() < 1e-6, "{x}/{n}: {got:?}");
        }
    }

    #[test]
    fn z95_is_the_normal_quantile() {
        // Phi(z) = 0.975, checked through statrs' normal distribution (common practice).
        use statrs::distribution::Normal;
        let normal = Normal::new(0.0, 1.0).unwrap();
        assert!((normal.cdf(Z95) - 0.975).abs() < 1e-9);
    }

    #[test]
    fn type_seven_quantiles_interpolate_between_order_statistics() {
        // Linear interpolation between order statistics ("type 7", common practice).
        let x = [1.0, 2.0, 4.0, 8.0, 16.0];
        assert_eq!(quantile(&x, 0.0), 1.0);
        assert_eq!(quantile(&x, 1.0), 16.0);
        assert_eq!(quantile(&x, 0.5), 4.0);
        // h = 4 * 0.05 = 0.2 -> 1 + 0.2 * (2 - 1)
        assert!((quantile(&x, 0.05) - 1.2).abs() < 1e-12);
        // h = 4 * 0.95 = 3.8 -> 8 + 0.8 * 8
        assert!((quantile(&x, 0.95) - 14.4).abs() < 1e-12);
        assert_eq!(quantile(&[3.0], 0.3), 3.0);
        assert!(quantile(&[], 0.5).is_nan());
    }
}
