//! Where a variant starts, and how per-deme answers combine into per-start answers.

use crate::model::Model;
use serde::{Deserialize, Serialize};

/// Where the single initial variant is placed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum Start {
    /// In deme `i` (index into the population's demes).
    Deme(usize),
    /// In a uniformly random individual: deme `i` with probability `n_i / N`.
    Uniform,
    /// In a uniformly random newborn: deme weighted by its turnover under the rule.
    AtBirth,
}

impl Start {
    /// Probability that the variant starts in each deme.
    pub fn deme_weights(self, model: &Model) -> Vec<f64> {
        let m = model.demes();
        match self {
            Start::Deme(i) => {
                let mut w = vec![0.0; m];
                w[i] = 1.0;
                w
            }
            Start::Uniform => {
                let total = model.total() as f64;
                model.sizes().iter().map(|&n| n as f64 / total).collect()
            }
            Start::AtBirth => model.birth_weights(),
        }
    }
}

/// Per-deme exact answers for a single variant placed in that deme.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DemeAnswer {
    /// Fixation probability.
    pub fixation_probability: f64,
    /// Mean time to absorption (fixation or loss), in generations.
    pub mean_absorption_generations: f64,
    /// Mean time to fixation among fixing paths, in generations (`NaN` if fixation is
    /// impossible).
    pub mean_fixation_generations: f64,
}

/// Mixes per-deme answers by start weights: probabilities and absorption times average
/// linearly, conditional fixation times average weighted by the chance of fixing. The mixed
/// probability is kept in `[0, 1]` (weights that sum to 1 up to round-off can carry a mix of
/// answers at 1 just above it).
pub fn combine(weights: &[f64], per_deme: &[DemeAnswer]) -> DemeAnswer {
    let mut rho = 0.0;
    let mut abs = 0.0;
    let mut fix_weighted = 0.0;
    for (w, a) in weights.iter().zip(per_deme) {
        if *w == 0.0 {
            continue;
        }
        rho += w * a.fixation_probability;
        abs += w * a.mean_absorption_generations;
        if a.fixation_probability > 0.0 {
            fix_weighted += w * a.fixation_probability * a.mean_fixation_generations;
        }
    }
    let rho = rho.clamp(0.0, 1.0);
    DemeAnswer {
        fixation_probability: rho,
        mean_absorption_generations: abs,
        mean_fixation_generations: if rho > 0.0 {
            fix_weighted / rho
        } else {
            f64::NAN
        },
    }
}
