//! Where the first-order weak-selection expansion can be trusted, for one model and one `s`.
//!
//! The expansion `rho_k(1 + s) ≈ rho_k(1) + s rho'_k` drops the terms of order `s^2`. Their
//! size is judged from the expansion itself. Kimura's (1962, Genetics 47:713-719) formula
//! `u(p) = (1 - e^{-a p}) / (1 - e^{-a})` (references.md §2.1), expanded for small `a`, is
//! `u(p) = p [1 + (a/2)(1 - p) + (a^2/12)(1 - p)(1 - 2p) + O(a^3)]` (derived here): when the
//! first-order term is a fraction `x` of the neutral value, the second-order term is about
//! `x^2 / 3` of it. So the indicator `max_relative_first_order = max_k |s rho'_k| / rho_k(1)`
//! plays the role of `N_e s / 2` for any structure, and needs no effective size of its own.
//! The answer is a probability only while `rho_k(1) + s rho'_k` stays in `[0, 1]`.

use super::WeakSelection;
use crate::approx::{Limit, ValidRegime};
use crate::model::Model;

/// Largest accepted `max_k |s rho'_k| / rho_k(1)`: at 0.5 the omitted second-order term is
/// about `0.5^2 / 3 ≈ 8%` of the neutral value, some 5% of the answer (module docs).
pub const MAX_RELATIVE_FIRST_ORDER: f64 = 0.5;

/// The regime of the first-order expansion `coefficients` (computed for `model`'s kernel,
/// sizes, rule and scope) at the selection coefficient of `model`.
pub fn regime(model: &Model, coefficients: &WeakSelection) -> ValidRegime {
    let s = model.fitness() - 1.0;
    let mut regime = ValidRegime::new("weak_selection");
    regime.check("n_s", model.total() as f64 * s.abs(), None, "");
    let relative = coefficients
        .neutral
        .iter()
        .zip(&coefficients.slope)
        .map(|(&neutral, &slope)| {
            let change = (s * slope).abs();
            if neutral > 0.0 {
                change / neutral
            } else if change == 0.0 {
                0.0
            } else {
                f64::INFINITY
            }
        })
        .fold(0.0f64, f64::max);
    regime.check(
        "max_relative_first_order",
        relative,
        Some(Limit::AtMost(MAX_RELATIVE_FIRST_ORDER)),
        "selection changes the fixation probability of some start deme by more than half of \
         its neutral value: the omitted terms of order s^2 are no longer small",
    );
    let values = coefficients.approximate(s);
    let lowest = values.iter().copied().fold(f64::INFINITY, f64::min);
    let highest = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    regime.check(
        "min_first_order_value",
        lowest,
        Some(Limit::AtLeast(0.0)),
        "the linear approximation is negative for some start deme",
    );
    regime.check(
        "max_first_order_value",
        highest,
        Some(Limit::AtMost(1.0)),
        "the linear approximation exceeds 1 for some start deme",
    );
    regime
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::migration::StochasticMatrix;
    use crate::model::{Rule, Scope};
    use crate::population::Population;

    fn one_deme(s: f64) -> Model {
        let k = StochasticMatrix::from_weights(&[vec![1.0]]).unwrap();
        let pop = Population::new(vec![100]).unwrap();
        Model::new(&pop, k, Rule::DeathBirth, Scope::Deme, s).unwrap()
    }

    #[test]
    fn the_relative_first_order_term_decides_and_a_negative_value_is_outside() {
        // Moran N = 100: rho(1) = 1/N and rho' = (N - 1)/(2N) (references.md §1.1, the
        // weak-selection slope of Moran's formula).
        let coefficients = WeakSelection {
            neutral: vec![0.01],
            slope: vec![0.495],
        };
        let small = regime(&one_deme(0.005), &coefficients);
        assert!(small.inside, "{small:?}");
        let x = small.indicator("max_relative_first_order").unwrap().value;
        assert!((x - 0.2475).abs() < 1e-12);
        assert!(!regime(&one_deme(0.02), &coefficients).inside);
        let negative = regime(&one_deme(-0.05), &coefficients);
        assert!(!negative.inside);
        assert!(!negative.indicator("min_first_order_value").unwrap().inside);
    }
}
