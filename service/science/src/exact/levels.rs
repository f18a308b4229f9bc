//! Renumbering of the event system by total variant count `K = sum_i k_i`.
//!
//! Every event changes `K` by ±1, so in this numbering `A` is block tridiagonal with diagonal
//! diagonal blocks: the states of one count form a contiguous range whose rows couple only to
//! the neighbouring ranges. The unknowns of one count are then independent in a triangular
//! sweep (the ILU(0) solves of [`super::precond`] run them in parallel), and the coarse
//! classes of the two-level preconditioner are contiguous. Within a count the states keep
//! their mixed-radix order.

use super::assembly::EventSystem;
use super::space::StateSpace;

/// The system in count order with the map back to mixed-radix order.
#[derive(Debug)]
pub(crate) struct Levels {
    /// The renumbered system.
    pub(crate) system: EventSystem,
    /// Mixed-radix system index of each renumbered unknown.
    pub(crate) old: Vec<u32>,
    /// Start of each count's range (count `K` is range `K - 1`), with the end appended.
    pub(crate) start: Vec<usize>,
}

impl Levels {
    /// Renumbers `system` (over the transient states of `space`) by total count.
    pub(crate) fn new(system: &EventSystem, space: &StateSpace) -> Self {
        let n = system.dim();
        let total: u64 = space.sizes().iter().sum();
        let classes = (total as usize).saturating_sub(1).max(1);
        // Count of every unknown, walking the mixed-radix order.
        let mut class = Vec::with_capacity(n);
        let mut k = vec![0u64; space.demes()];
        space.decode(1, &mut k);
        for _ in 0..n {
            class.push((k.iter().sum::<u64>() - 1) as u32);
            space.advance(&mut k);
        }
        // Counting sort by class (stable).
        let mut start = vec![0usize; classes + 1];
        for &c in &class {
            start[c as usize + 1] += 1;
        }
        for c in 0..classes {
            start[c + 1] += start[c];
        }
        let mut next = start.clone();
        let mut old = vec![0u32; n];
        let mut new_of = vec![0u32; n];
        for (i, &c) in class.iter().enumerate() {
            let slot = next[c as usize];
            next[c as usize] += 1;
            old[slot] = i as u32;
            new_of[i] = slot as u32;
        }
        let mut renumbered = EventSystem {
            diag: Vec::with_capacity(n),
            row_start: Vec::with_capacity(n + 1),
            col: Vec::with_capacity(system.col.len()),
            prob: Vec::with_capacity(system.prob.len()),
            to_fixation: Vec::with_capacity(n),
            frozen: Vec::with_capacity(n),
        };
        renumbered.row_start.push(0);
        let mut entries: Vec<(u32, f64)> = Vec::new();
        for &o in &old {
            let o = o as usize;
            let range = system.row_start[o]..system.row_start[o + 1];
            entries.clear();
            entries.extend(
                system.col[range.clone()]
                    .iter()
                    .zip(&system.prob[range])
                    .map(|(&c, &p)| (new_of[c as usize], p)),
            );
            entries.sort_unstable_by_key(|&(c, _)| c);
            renumbered.col.extend(entries.iter().map(|&(c, _)| c));
            renumbered.prob.extend(entries.iter().map(|&(_, p)| p));
            renumbered.row_start.push(renumbered.col.len());
            renumbered.diag.push(system.diag[o]);
            renumbered.to_fixation.push(system.to_fixation[o]);
            renumbered.frozen.push(system.frozen[o]);
        }
        Self {
            system: renumbered,
            old,
            start,
        }
    }

    /// Count class (`K - 1`) of every renumbered unknown.
    pub(crate) fn classes(&self) -> Vec<u32> {
        let mut class = Vec::with_capacity(self.old.len());
        for (c, w) in self.start.windows(2).enumerate() {
            class.extend(std::iter::repeat_n(c as u32, w[1] - w[0]));
        }
        class
    }

    /// Mixed-radix order of a vector in count order.
    pub(crate) fn to_mixed_radix(&self, v: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; v.len()];
        for (&o, &x) in self.old.iter().zip(v) {
            out[o as usize] = x;
        }
        out
    }
}
