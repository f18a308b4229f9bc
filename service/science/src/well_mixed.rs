//! Well-mixed references: the Moran and haploid Wright-Fisher fixation probabilities of an
//! unstructured population of the same total size.
//!
//! OWNER: approximations helper. The signature of [`reference`] is a contract.

use crate::model::Rule;

/// The fixation probability of one variant in a well-mixed population of the same total size.
#[derive(Debug, Clone, PartialEq)]
pub struct WellMixedReference {
    /// Fixation probability of a single variant.
    pub fixation_probability: f64,
    /// Which formula gave it: `moran`, `wright_fisher_exact` or `kimura_diffusion`.
    pub method: &'static str,
}

/// Reference for `rule` with total size `total` and selection coefficient `s`.
pub fn reference(rule: Rule, total: u64, s: f64) -> WellMixedReference {
    let _ = (rule, total, s);
    unimplemented!("well_mixed::reference")
}
