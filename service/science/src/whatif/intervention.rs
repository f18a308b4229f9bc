//! Interventions on movement links: which kernel entry a link is, how a change is applied so
//! that rows stay stochastic, and the flow measure the plan's budget is counted in.
//!
//! # Which matrix a link acts on
//! A link `a -> b` is the movement of lineages from deme `a` to deme `b`. It is one entry of
//! the rule's kernel, the matrix the chain actually uses (model.md):
//!
//! * death-birth and Wright-Fisher, recruitment `B` (row = receiving deme): `B[b][a]`, the
//!   chance that a vacancy in `b` is filled by offspring from `a`;
//! * birth-death, dispersal `F` (row = sending deme): `F[a][b]`, the chance that offspring of
//!   a parent in `a` settles in `b`.
//!
//! Every change keeps its row stochastic by moving probability between the link and the same
//! row's retention `K_row,row`, the meaning of a link effect in [`crate::sensitivity`]:
//! reducing `B[b][a]` makes `b` refill more of its vacancies locally; reducing `F[a][b]` keeps
//! more of `a`'s offspring at home. Scaling a link up takes the extra probability from
//! retention and is an error when the retention does not hold enough. The same entry is
//! changed whatever orientation the caller sent (`flows`, `recruitment` or `dispersal`), so a
//! what-if and the first-order link effects of the sensitivities speak about the same thing.
//!
//! # Flow
//! The flow along a link is the expected number of lineage movements along it per generation
//! in the neutral chain: `n_row K_row,col` (a deme `b` of `n_b` individuals fills `n_b`
//! vacancies per generation under death-birth and Wright-Fisher, a fraction `B[b][a]` of them
//! from `a`; under birth-death deme `a` has `n_a` births per generation, a fraction `F[a][b]`
//! of which settles in `b`). The total inter-deme flow is the sum over the off-diagonal
//! entries; cutting a link by `x` units of probability removes `n_row x` of it.

use crate::migration::StochasticMatrix;
use crate::model::{Model, Rule};

/// Retention may fall this far below 0 through rounding before a scale-up is refused; a
/// smaller negative remainder is set to 0.
const RETENTION_ROUNDING: f64 = 1e-12;

/// A movement link: lineages move from deme `from` to deme `to` (`from != to`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Link {
    /// Deme the lineage leaves.
    pub from: usize,
    /// Deme the lineage settles in.
    pub to: usize,
}

impl Link {
    /// The kernel position `(row, col)` of the link under `rule`: `B[to][from]` for
    /// death-birth and Wright-Fisher, `F[from][to]` for birth-death.
    pub fn position(self, rule: Rule) -> (usize, usize) {
        match rule {
            Rule::DeathBirth | Rule::WrightFisher => (self.to, self.from),
            Rule::BirthDeath => (self.from, self.to),
        }
    }

    /// The link at kernel position `(row, col)` under `rule` (inverse of [`Link::position`]).
    pub fn at(rule: Rule, row: usize, col: usize) -> Self {
        match rule {
            Rule::DeathBirth | Rule::WrightFisher => Self { from: col, to: row },
            Rule::BirthDeath => Self { from: row, to: col },
        }
    }
}

/// One change of a what-if scenario. Factors are finite and non-negative.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Change {
    /// Multiply one existing link by `factor` (0 closes it, above 1 strengthens it).
    ScaleLink {
        /// The link.
        link: Link,
        /// The factor.
        factor: f64,
    },
    /// Close one existing link (the same as scaling it by 0).
    CloseLink(Link),
    /// Multiply every link out of `deme` (lineages leaving it) by `factor`.
    ScaleOutOf {
        /// The deme.
        deme: usize,
        /// The factor.
        factor: f64,
    },
    /// Multiply every link into `deme` (lineages settling in it) by `factor`.
    ScaleInto {
        /// The deme.
        deme: usize,
        /// The factor.
        factor: f64,
    },
}

/// Why a change cannot be applied.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum InterventionError {
    /// A deme index is out of range.
    #[error("deme {deme} does not exist (there are {demes} demes)")]
    DemeOutOfRange {
        /// The index.
        deme: usize,
        /// Number of demes.
        demes: usize,
    },
    /// A link from a deme to itself (retention is not a link).
    #[error("a link joins two different demes; deme {deme} to itself is its retention")]
    SelfLink {
        /// The deme.
        deme: usize,
    },
    /// The link has probability 0 in the rule's matrix: lineages never move along it.
    #[error("there is no link from deme {} to deme {} in the rule's matrix", .link.from, .link.to)]
    NoSuchLink {
        /// The link.
        link: Link,
    },
    /// A factor is negative or not finite.
    #[error("the factor {factor} must be a finite number >= 0")]
    Factor {
        /// The factor.
        factor: f64,
    },
    /// Scaling up needs more probability than the row's retention holds.
    #[error(
        "row {row} of the rule's matrix needs {needed} more probability on its links but its \
         retention holds only {available}"
    )]
    RetentionExhausted {
        /// Kernel row.
        row: usize,
        /// Probability the scale-up adds to the row's links.
        needed: f64,
        /// Retention before the change.
        available: f64,
    },
}

/// A kernel being changed: dense row-major entries, rebuilt into a [`StochasticMatrix`] at
/// the end.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct KernelEdit {
    m: usize,
    dense: Vec<f64>,
}

impl KernelEdit {
    pub(crate) fn new(kernel: &StochasticMatrix) -> Self {
        Self {
            m: kernel.dim(),
            dense: kernel.dense().to_vec(),
        }
    }

    pub(crate) fn get(&self, row: usize, col: usize) -> f64 {
        self.dense[row * self.m + col]
    }

    /// Moves `amount` (at most the entry) from off-diagonal `(row, col)` to the row's
    /// retention. Moving the whole entry sets it to exactly 0.
    pub(crate) fn cut(&mut self, row: usize, col: usize, amount: f64) {
        let m = self.m;
        let entry = self.dense[row * m + col];
        let amount = amount.clamp(0.0, entry);
        self.dense[row * m + col] = if amount == entry { 0.0 } else { entry - amount };
        self.dense[row * m + row] += amount;
    }

    /// Multiplies the off-diagonal entries `cells` (all in `row`) by `factor`, settling the
    /// difference with the row's retention.
    fn scale_row_cells(
        &mut self,
        row: usize,
        cells: &[usize],
        factor: f64,
    ) -> Result<(), InterventionError> {
        let m = self.m;
        let mut freed = 0.0;
        let mut scaled = Vec::with_capacity(cells.len());
        for &col in cells {
            let old = self.dense[row * m + col];
            let new = old * factor;
            freed += old - new;
            scaled.push(new);
        }
        let available = self.dense[row * m + row];
        let retention = available + freed;
        if retention < -RETENTION_ROUNDING {
            return Err(InterventionError::RetentionExhausted {
                row,
                needed: -freed,
                available,
            });
        }
        for (&col, new) in cells.iter().zip(scaled) {
            self.dense[row * m + col] = new;
        }
        self.dense[row * m + row] = retention.max(0.0);
        Ok(())
    }

    pub(crate) fn finish(self) -> StochasticMatrix {
        StochasticMatrix::from_dense(self.m, self.dense)
    }
}

fn check_factor(factor: f64) -> Result<(), InterventionError> {
    if factor.is_finite() && factor >= 0.0 {
        Ok(())
    } else {
        Err(InterventionError::Factor { factor })
    }
}

fn check_deme(deme: usize, demes: usize) -> Result<(), InterventionError> {
    if deme < demes {
        Ok(())
    } else {
        Err(InterventionError::DemeOutOfRange { deme, demes })
    }
}

/// Checks that `link` joins two existing demes and has positive probability in `kernel`.
pub fn check_link(
    kernel: &StochasticMatrix,
    rule: Rule,
    link: Link,
) -> Result<(), InterventionError> {
    let m = kernel.dim();
    check_deme(link.from, m)?;
    check_deme(link.to, m)?;
    if link.from == link.to {
        return Err(InterventionError::SelfLink { deme: link.from });
    }
    let (row, col) = link.position(rule);
    if kernel.get(row, col) > 0.0 {
        Ok(())
    } else {
        Err(InterventionError::NoSuchLink { link })
    }
}

fn apply_one(
    edit: &mut KernelEdit,
    kernel: &StochasticMatrix,
    rule: Rule,
    change: &Change,
) -> Result<(), InterventionError> {
    let m = kernel.dim();
    match *change {
        Change::ScaleLink { link, factor } => {
            check_factor(factor)?;
            check_link(kernel, rule, link)?;
            let (row, col) = link.position(rule);
            edit.scale_row_cells(row, &[col], factor)
        }
        Change::CloseLink(link) => {
            check_link(kernel, rule, link)?;
            let (row, col) = link.position(rule);
            edit.scale_row_cells(row, &[col], 0.0)
        }
        Change::ScaleOutOf { deme, factor } | Change::ScaleInto { deme, factor } => {
            check_factor(factor)?;
            check_deme(deme, m)?;
            let outgoing = matches!(change, Change::ScaleOutOf { .. });
            // Links out of a deme are a column of B but a row of F; links into it the reverse.
            let along_row = outgoing == (rule == Rule::BirthDeath);
            if along_row {
                let cells: Vec<usize> = (0..m)
                    .filter(|&j| j != deme && edit.get(deme, j) > 0.0)
                    .collect();
                edit.scale_row_cells(deme, &cells, factor)
            } else {
                let rows: Vec<usize> = (0..m)
                    .filter(|&i| i != deme && edit.get(i, deme) > 0.0)
                    .collect();
                for row in rows {
                    edit.scale_row_cells(row, &[deme], factor)?;
                }
                Ok(())
            }
        }
    }
}

/// Applies `changes` in order to the kernel of `model` and returns the new kernel. Each
/// change acts on the result of the ones before; a link change needs the link to exist in the
/// kernel of `model` as given. Every failing change is reported with its index (and skipped),
/// not only the first.
pub fn apply(
    model: &Model,
    changes: &[Change],
) -> Result<StochasticMatrix, Vec<(usize, InterventionError)>> {
    let kernel = model.kernel();
    let mut edit = KernelEdit::new(kernel);
    let mut errors = Vec::new();
    for (index, change) in changes.iter().enumerate() {
        let before = edit.clone();
        if let Err(e) = apply_one(&mut edit, kernel, model.rule(), change) {
            edit = before;
            errors.push((index, e));
        }
    }
    if errors.is_empty() {
        Ok(edit.finish())
    } else {
        Err(errors)
    }
}

/// The model of a scenario: `model` with its kernel changed by [`apply`].
pub fn scenario(
    model: &Model,
    changes: &[Change],
) -> Result<Model, Vec<(usize, InterventionError)>> {
    let kernel = apply(model, changes)?;
    Ok(model
        .with_kernel(kernel)
        .expect("a changed kernel keeps its dimension"))
}

/// Expected lineage movements per generation along kernel entry `(row, col)` in the neutral
/// chain: `n_row K_row,col` (module docs).
pub fn entry_flow(model: &Model, row: usize, col: usize) -> f64 {
    model.sizes()[row] as f64 * model.kernel().get(row, col)
}

/// Total inter-deme flow of `model`: [`entry_flow`] summed over the off-diagonal entries.
pub fn total_flow(model: &Model) -> f64 {
    let kernel = model.kernel();
    (0..model.demes())
        .map(|i| {
            kernel
                .row(i)
                .filter(|&(j, _)| j != i)
                .map(|(_, v)| v)
                .sum::<f64>()
                * model.sizes()[i] as f64
        })
        .sum()
}

/// A deme that two separate source groups feed forever: the chain is then never absorbed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StaysMixed {
    /// The deme.
    pub deme: usize,
    /// One deme of each of two source groups that both reach it.
    pub sources: (usize, usize),
}

/// Whether a model's chain can stay unabsorbed forever because of its migration graph, and
/// where. A source group is a set of demes whose lineages reach each other and that no deme
/// outside it reaches (a closed class of the recruitment graph read backwards): it evolves
/// on its own. A variant that starts in one source group can fix there while another stays
/// resident; a deme both reach then keeps receiving both types and the chain never settles
/// (the exact system is singular and ensemble replicates run to `max_generations`). `None`
/// when no deme is reached from two source groups (then every chain is absorbed, or freezes
/// without fixing, as the model contract says).
pub fn stays_mixed(model: &Model) -> Option<StaysMixed> {
    let m = model.demes();
    let reach = crate::reach::reachable_from_each(model);
    // A deme is in a source group when every deme reaching it is reached back; the group's
    // representative is its smallest deme.
    let representative: Vec<Option<usize>> = (0..m)
        .map(|j| {
            let source = (0..m).all(|i| !reach[i][j] || reach[j][i]);
            source.then(|| (0..m).find(|&i| reach[i][j]).expect("j reaches itself"))
        })
        .collect();
    let mut roots: Vec<usize> = representative.iter().flatten().copied().collect();
    roots.sort_unstable();
    roots.dedup();
    if roots.len() < 2 {
        return None;
    }
    (0..m).find_map(|deme| {
        let mut feeding = roots.iter().filter(|&&r| reach[r][deme]);
        match (feeding.next(), feeding.next()) {
            (Some(&a), Some(&b)) => Some(StaysMixed {
                deme,
                sources: (a, b),
            }),
            _ => None,
        }
    })
}
