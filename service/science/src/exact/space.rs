//! The state space of the exact chain: every count vector `k` with `0 <= k_i <= n_i`, numbered
//! in mixed radix.
//!
//! Deme `i` is one digit of radix `n_i + 1`. The digits are ordered so that the smallest radix
//! varies fastest and the largest slowest: a move `k -> k ± e_i` changes the index by the
//! stride of deme `i`, and the largest stride (the bandwidth of the system matrix) is then
//! `states / (n_max + 1)`, the smallest any digit order gives. Index 0 is `k = 0` (variant
//! lost) and the last index is `k = n` (variant fixed); every other index is transient.

use crate::model::{Model, Rule};

/// Mixed-radix numbering of the count vectors of one population.
#[derive(Debug, Clone)]
pub(crate) struct StateSpace {
    sizes: Vec<u64>,
    /// `order[d]` is the deme of digit `d`; digit 0 varies fastest.
    order: Vec<usize>,
    /// Index stride of each deme, in deme order.
    stride: Vec<usize>,
    states: usize,
}

impl StateSpace {
    /// Numbering for deme sizes `sizes`; `None` when the count overflows `usize`.
    pub(crate) fn new(sizes: &[u64]) -> Option<Self> {
        let m = sizes.len();
        let mut order: Vec<usize> = (0..m).collect();
        order.sort_by_key(|&i| sizes[i]);
        let mut stride = vec![0usize; m];
        let mut states = 1usize;
        for &deme in &order {
            stride[deme] = states;
            let radix = usize::try_from(sizes[deme]).ok()?.checked_add(1)?;
            states = states.checked_mul(radix)?;
        }
        Some(Self {
            sizes: sizes.to_vec(),
            order,
            stride,
            states,
        })
    }

    /// Number of count vectors `prod (n_i + 1)`.
    pub(crate) fn states(&self) -> usize {
        self.states
    }

    /// Number of transient count vectors (all but `k = 0` and `k = n`).
    pub(crate) fn transient(&self) -> usize {
        self.states.saturating_sub(2)
    }

    /// Index of the fixation state `k = n`.
    pub(crate) fn fixed(&self) -> usize {
        self.states - 1
    }

    /// Index change of a move `k -> k + e_deme`.
    pub(crate) fn stride(&self, deme: usize) -> usize {
        self.stride[deme]
    }

    /// Largest index distance between two states one move apart.
    pub(crate) fn bandwidth(&self) -> usize {
        self.stride.iter().copied().max().unwrap_or(0)
    }

    /// Number of demes.
    pub(crate) fn demes(&self) -> usize {
        self.sizes.len()
    }

    /// Deme sizes in deme order.
    pub(crate) fn sizes(&self) -> &[u64] {
        &self.sizes
    }

    /// Index of count vector `k` (deme order).
    #[cfg(test)]
    pub(crate) fn index(&self, k: &[u64]) -> usize {
        k.iter()
            .zip(&self.stride)
            .map(|(&ki, &s)| ki as usize * s)
            .sum()
    }

    /// Index of the state with one variant in `deme` and none elsewhere.
    pub(crate) fn single(&self, deme: usize) -> usize {
        self.stride[deme]
    }

    /// Writes the count vector of index `s` into `k` (deme order).
    pub(crate) fn decode(&self, mut s: usize, k: &mut [u64]) {
        for &deme in &self.order {
            let radix = self.sizes[deme] as usize + 1;
            k[deme] = (s % radix) as u64;
            s /= radix;
        }
    }

    /// Advances `k` to the count vector of the next index (wrapping after `k = n`).
    pub(crate) fn advance(&self, k: &mut [u64]) {
        for &deme in &self.order {
            if k[deme] < self.sizes[deme] {
                k[deme] += 1;
                return;
            }
            k[deme] = 0;
        }
    }
}

/// Which count vectors can still reach fixation: those whose variant-carrying demes reach every
/// deme along the spread graph (offspring from `j` can land in `i` when `B[i][j] > 0` for
/// death-birth and Wright-Fisher, `F[j][i] > 0` for birth-death; the same graph as
/// [`crate::reach`]). An up-move into deme `i` is possible exactly when `k_i < n_i` and some
/// variant-carrying deme spreads to `i`, so growing demes one at a time along the graph is a
/// path of positive probability; when the closure misses a deme, no path fixes.
#[derive(Debug, Clone)]
pub(crate) struct SpreadClosure {
    /// Demes each deme spreads to, as a bit mask (itself included).
    successors: Vec<u64>,
    all: u64,
    /// `true` when every nonzero count vector reaches fixation (strongly connected graph).
    connected: bool,
}

impl SpreadClosure {
    /// Spread graph of `model`; `None` when there are more than 64 demes (such models never fit
    /// the exact method's state limits, since every deme has at least two counts).
    pub(crate) fn new(model: &Model) -> Option<Self> {
        let m = model.demes();
        if m > 64 {
            return None;
        }
        let kernel = model.kernel();
        let successors: Vec<u64> = (0..m)
            .map(|j| {
                let targets: Box<dyn Iterator<Item = (usize, f64)>> = match model.rule() {
                    Rule::BirthDeath => Box::new(kernel.row(j)),
                    Rule::DeathBirth | Rule::WrightFisher => Box::new(kernel.col(j)),
                };
                targets
                    .filter(|&(_, w)| w > 0.0)
                    .fold(1u64 << j, |acc, (i, _)| acc | (1u64 << i))
            })
            .collect();
        let all = if m == 64 { u64::MAX } else { (1u64 << m) - 1 };
        let mut closure = Self {
            successors,
            all,
            connected: false,
        };
        closure.connected = (0..m).all(|j| closure.close(1u64 << j) == all);
        Some(closure)
    }

    fn close(&self, mut set: u64) -> u64 {
        loop {
            let mut next = set;
            let mut rest = set;
            while rest != 0 {
                let j = rest.trailing_zeros() as usize;
                rest &= rest - 1;
                next |= self.successors[j];
            }
            if next == set {
                return set;
            }
            set = next;
        }
    }

    /// Whether every nonzero count vector can reach fixation.
    pub(crate) fn connected(&self) -> bool {
        self.connected
    }

    /// Whether count vector `k` can reach fixation.
    pub(crate) fn can_fix(&self, k: &[u64]) -> bool {
        let support = k
            .iter()
            .enumerate()
            .filter(|&(_, &c)| c > 0)
            .fold(0u64, |acc, (i, _)| acc | (1u64 << i));
        support != 0 && (self.connected || self.close(support) == self.all)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn indexing_round_trips_and_puts_the_largest_radix_last() {
        let space = StateSpace::new(&[4, 1, 2]).unwrap();
        assert_eq!(space.states(), 5 * 2 * 3);
        // digit order: deme 1 (radix 2), deme 2 (radix 3), deme 0 (radix 5)
        assert_eq!(space.stride(1), 1);
        assert_eq!(space.stride(2), 2);
        assert_eq!(space.stride(0), 6);
        assert_eq!(space.bandwidth(), 6);
        let mut k = [0u64; 3];
        let mut walked = [0u64; 3];
        for s in 0..space.states() {
            space.decode(s, &mut k);
            assert_eq!(k, walked);
            assert_eq!(space.index(&k), s);
            space.advance(&mut walked);
        }
        assert_eq!(space.index(&[4, 1, 2]), space.fixed());
    }
}
