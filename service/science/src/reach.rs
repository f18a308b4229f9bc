//! Which demes a variant lineage can spread to: a variant can only fix from a deme whose
//! descendants can reach every deme.

use crate::model::{Model, Rule};

/// `reach[j][i]`: whether a lineage starting in deme `j` can reach deme `i` (every deme
/// reaches itself). Offspring spread from `j` to `i` when `B[i][j] > 0` (death-birth,
/// Wright-Fisher) or `F[j][i] > 0` (birth-death).
pub fn reachable_from_each(model: &Model) -> Vec<Vec<bool>> {
    let m = model.demes();
    let kernel = model.kernel();
    let successors = |j: usize| -> Vec<usize> {
        match model.rule() {
            Rule::BirthDeath => kernel.row(j).map(|(i, _)| i).collect(),
            Rule::DeathBirth | Rule::WrightFisher => kernel.col(j).map(|(i, _)| i).collect(),
        }
    };
    let succ: Vec<Vec<usize>> = (0..m).map(successors).collect();
    (0..m)
        .map(|start| {
            let mut seen = vec![false; m];
            let mut stack = vec![start];
            seen[start] = true;
            while let Some(j) = stack.pop() {
                for &i in &succ[j] {
                    if !seen[i] {
                        seen[i] = true;
                        stack.push(i);
                    }
                }
            }
            seen
        })
        .collect()
}

/// For each deme `j`, the demes a lineage starting in `j` can never reach (empty when the
/// migration graph is strongly connected; see [`reachable_from_each`]).
pub fn unreachable_from_each(model: &Model) -> Vec<Vec<usize>> {
    reachable_from_each(model)
        .into_iter()
        .map(|seen| (0..seen.len()).filter(|&i| !seen[i]).collect())
        .collect()
}
