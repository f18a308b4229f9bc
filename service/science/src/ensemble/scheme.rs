//! How replicates step through time: which scheme a job asks for ([`Scheme`]), what it
//! resolves to for a model ([`Stepping`]), the stable names results carry and the known
//! bias of the generation scheme.
//!
//! * Wright-Fisher has non-overlapping generations: it is always stepped one generation at a
//!   time (one binomial draw per deme), which is the model's own step and exact.
//! * Death-birth and birth-death are stepped event by event ([`Stepping::Event`], exact in
//!   distribution), or by the generation scheme ([`Stepping::Generation`]): event by event
//!   near the boundaries, whole generations leaped in between (see `chain/leap.rs` for the
//!   rule and the measured error). `Scheme::Auto` takes the generation scheme from a total
//!   size of [`AUTO_GENERATION_FROM_TOTAL`].

use crate::model::{Model, Rule};
use serde::{Deserialize, Serialize};

/// From this total size `N`, [`Scheme::Auto`] steps death-birth and birth-death by the
/// generation scheme. Reason: a selective sweep takes about `2 N / |s|` state changes event
/// by event (the integral of the heterozygosity over the sweep), about `10^8` at
/// `N = 10^6`, `s = 0.02`: several seconds per fixing replicate at the measured 10-30
/// million changes per second and core (DEVELOPERS.md, performance notes). Below it the
/// exact event scheme is affordable; above it the generation scheme costs `O(m + nnz)` per
/// generation and its measured error (chain/leap.rs) is far below the ensemble's sampling
/// error at the usual replicate counts.
pub const AUTO_GENERATION_FROM_TOTAL: u64 = 1_000_000;

/// The stepping a job asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Scheme {
    /// The event scheme below [`AUTO_GENERATION_FROM_TOTAL`] individuals, the generation
    /// scheme from there (death-birth and birth-death); Wright-Fisher by generations.
    #[default]
    Auto,
    /// Death-birth and birth-death event by event (exact in distribution). Wright-Fisher has
    /// no events and is stepped by generations.
    Event,
    /// Death-birth and birth-death by the generation scheme; Wright-Fisher by generations.
    Generation,
}

/// The stepping a replicate actually uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Stepping {
    /// Event by event (death-birth and birth-death).
    Event,
    /// Generation by generation: Wright-Fisher's own step, or the generation scheme of
    /// death-birth and birth-death.
    Generation,
}

/// Known bias of the generation scheme of death-birth and birth-death, for a result's
/// warnings.
pub const GENERATION_SCHEME_BIAS: &str = "approximate stepping: the generation scheme leaps \
whole generations in demes holding many of both types (Poisson gains and losses with the \
rule's per-generation mean and variance, taken at the generation's midpoint) and runs the \
other demes event by event; \
against the event scheme (demes of 1,000 to 10,000, s = 0.002 to 0.05) its mean fixation \
times differed by -1% to +1% and its fixation probabilities by at most 1% of their value, \
within sampling error";

impl Scheme {
    /// The stepping this scheme resolves to for `model`.
    pub fn resolve(self, model: &Model) -> Stepping {
        match (model.rule(), self) {
            (Rule::WrightFisher, _) | (_, Scheme::Generation) => Stepping::Generation,
            (_, Scheme::Event) => Stepping::Event,
            (_, Scheme::Auto) if model.total() >= AUTO_GENERATION_FROM_TOTAL => {
                Stepping::Generation
            }
            (_, Scheme::Auto) => Stepping::Event,
        }
    }

    /// Name used in documents (`auto`, `event`, `generation`).
    pub fn as_str(self) -> &'static str {
        match self {
            Scheme::Auto => "auto",
            Scheme::Event => "event",
            Scheme::Generation => "generation",
        }
    }
}

impl Stepping {
    /// Stable name for a result's `method`: `ensemble:event` or `ensemble:generation`.
    pub fn method(self) -> &'static str {
        match self {
            Stepping::Event => "ensemble:event",
            Stepping::Generation => "ensemble:generation",
        }
    }

    /// The known bias of this stepping under `rule`, if any: `None` for the event scheme and
    /// for Wright-Fisher (whose generation is the model's own step).
    pub fn known_bias(self, rule: Rule) -> Option<&'static str> {
        match (self, rule) {
            (Stepping::Generation, Rule::DeathBirth | Rule::BirthDeath) => {
                Some(GENERATION_SCHEME_BIAS)
            }
            _ => None,
        }
    }

    /// Whether replicates of `rule` leap generations (the generation scheme of an event
    /// rule).
    pub(crate) fn leaps(self, rule: Rule) -> bool {
        self == Stepping::Generation && rule.counts_events()
    }
}
