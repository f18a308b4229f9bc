//! Deme sizes of a structured population.

/// The sizes `n_i >= 1` of the `m` demes, in deme order. Sizes stay constant over time.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Population {
    sizes: Vec<u64>,
    total: u64,
}

/// Why a list of deme sizes does not describe a population.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PopulationError {
    /// There are no demes at all.
    #[error("a population needs at least one deme")]
    Empty,
    /// Deme `deme` has size zero.
    #[error("deme {deme} has size 0; every deme holds at least one individual")]
    ZeroSize {
        /// Index of the offending deme.
        deme: usize,
    },
    /// The total size does not fit in 64 bits.
    #[error("the total population size overflows 64 bits")]
    TotalOverflow,
}

impl Population {
    /// Builds a population from deme sizes, each at least 1.
    pub fn new(sizes: Vec<u64>) -> Result<Self, PopulationError> {
        if sizes.is_empty() {
            return Err(PopulationError::Empty);
        }
        if let Some(deme) = sizes.iter().position(|&n| n == 0) {
            return Err(PopulationError::ZeroSize { deme });
        }
        let total = sizes
            .iter()
            .try_fold(0u64, |acc, &n| acc.checked_add(n))
            .ok_or(PopulationError::TotalOverflow)?;
        Ok(Self { sizes, total })
    }

    /// Deme sizes in deme order.
    pub fn sizes(&self) -> &[u64] {
        &self.sizes
    }

    /// Number of demes `m`.
    pub fn demes(&self) -> usize {
        self.sizes.len()
    }

    /// Total size `N = sum n_i`.
    pub fn total(&self) -> u64 {
        self.total
    }

    /// Number of count vectors `prod (n_i + 1)`, or `None` when it exceeds `u64`.
    pub fn state_count(&self) -> Option<u64> {
        self.sizes
            .iter()
            .try_fold(1u64, |acc, &n| acc.checked_mul(n.checked_add(1)?))
    }
}
