//! A sum tree over non-negative weights (the sparse path of the jump chain): find the leaf
//! where a point of `[0, total)` falls in `O(log m)` without branching on the data. Leaves
//! change one pair at a time with their ancestors recomputed from their children
//! (`O(log m)`), so the sums never drift from the leaves.

/// Complete binary tree stored in an array; leaves start at `cap` (the default is an empty
/// tree with no leaves).
#[derive(Debug, Clone, Default)]
pub(crate) struct SumTree {
    cap: usize,
    node: Vec<f64>,
}

impl SumTree {
    /// A tree of `len` zero leaves.
    pub(crate) fn new(len: usize) -> Self {
        let cap = len.max(2).next_power_of_two();
        Self {
            cap,
            node: vec![0.0; 2 * cap],
        }
    }

    /// Leaf `i`.
    #[cfg(test)]
    pub(crate) fn leaf(&self, i: usize) -> f64 {
        self.node[self.cap + i]
    }

    /// Sets leaves `2 p` and `2 p + 1` and recomputes their ancestors.
    #[inline(always)]
    pub(crate) fn set_pair(&mut self, p: usize, a: f64, b: f64) {
        let mut at = self.cap + 2 * p;
        self.node[at] = a;
        self.node[at + 1] = b;
        at >>= 1;
        self.node[at] = a + b;
        while at > 1 {
            at >>= 1;
            self.node[at] = self.node[2 * at] + self.node[2 * at + 1];
        }
    }

    /// Sum of all leaves.
    #[inline(always)]
    pub(crate) fn total(&self) -> f64 {
        self.node[1]
    }

    /// The leaf `i` with `sum(leaves < i) <= v < sum(leaves <= i)`. Never returns a zero
    /// leaf while the total is positive: a point pushed past the end by rounding goes to the
    /// last positive leaf.
    #[inline(always)]
    pub(crate) fn find(&self, mut v: f64) -> usize {
        let mut at = 1;
        while at < self.cap {
            let left = self.node[2 * at];
            let right = self.node[2 * at + 1];
            let go_right = (v >= left) & (right > 0.0);
            v -= if go_right { left } else { 0.0 };
            at = 2 * at + usize::from(go_right);
        }
        at - self.cap
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_tree_finds_the_leaf_holding_a_point() {
        {
            let mut t = SumTree::new(6);
            for (p, (a, b)) in [(1.0, 0.0), (2.0, 0.5), (0.0, 0.0)].into_iter().enumerate() {
                t.set_pair(p, a, b);
            }
            assert_eq!(t.total(), 3.5);
            assert_eq!(t.leaf(3), 0.5);
            assert_eq!(t.find(0.5), 0);
            assert_eq!(t.find(1.0), 2);
            assert_eq!(t.find(2.99), 2);
            assert_eq!(t.find(3.2), 3);
            // rounding past the end lands on the last positive leaf, never a zero one
            assert_eq!(t.find(3.5 + 1e-12), 3);
            t.set_pair(1, 0.0, 0.5);
            assert_eq!(t.total(), 1.5);
            assert_eq!(t.find(1.2), 3);
        }
    }
}
