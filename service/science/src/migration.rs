//! Migration matrices: the three orientations a caller may send, and their conversion into
//! the row-stochastic matrix an update rule uses.
//!
//! * recruitment `B` (row = receiving deme): `B[i][j]` is the probability that a vacancy in
//!   deme `i` is filled by offspring from deme `j`; used by death-birth and Wright-Fisher.
//! * dispersal `F` (row = sending deme): `F[j][l]` is the probability that offspring of a
//!   parent in deme `j` settles in deme `l`; used by birth-death.
//! * flows `C` (row = from, column = to): raw movement or contact counts;
//!   `F` normalises the rows of `C`, `B` normalises its columns.
//!
//! Converting between `B` and `F` assumes equal per-capita fecundity and needs the deme sizes:
//! `B[i][j] = n_j F[j][i] / sum_j' n_j' F[j'][i]` and `F[j][l] ∝ n_l B[l][j]`, rows renormalised.

use serde::{Deserialize, Serialize};

/// Which matrix the caller sent.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Orientation {
    /// Backward migration `B`, row = receiving deme.
    Recruitment,
    /// Forward migration `F`, row = sending deme.
    Dispersal,
    /// Raw non-negative flows or contacts, row = from, column = to.
    Flows,
}

/// What to do with the diagonal of a flows matrix.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SelfFlows {
    /// Use the diagonal as sent (movements that stay in their deme).
    Keep,
    /// Replace the diagonal by this local-retention probability; the off-diagonal entries of
    /// each row of the derived matrix share `1 - p` in proportion to the flows.
    Retention(f64),
}

/// A migration matrix as received, before normalisation.
#[derive(Debug, Clone, PartialEq)]
pub struct MigrationInput {
    /// Orientation of `rows`.
    pub orientation: Orientation,
    /// The `m x m` entries, in deme order.
    pub rows: Vec<Vec<f64>>,
    /// Treatment of a flows diagonal (ignored for the other orientations).
    pub self_flows: SelfFlows,
}

/// One problem found in a migration matrix, with its location.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum MatrixIssue {
    /// The matrix has the wrong number of rows.
    #[error("the matrix has {rows} rows but there are {expected} demes")]
    RowCount {
        /// Rows received.
        rows: usize,
        /// Number of demes.
        expected: usize,
    },
    /// A row has the wrong number of entries.
    #[error("row {row} has {len} entries but there are {expected} demes")]
    RowLength {
        /// Row index.
        row: usize,
        /// Entries received.
        len: usize,
        /// Number of demes.
        expected: usize,
    },
    /// An entry is NaN or infinite.
    #[error("entry ({row}, {col}) is not a finite number")]
    NotFinite {
        /// Row index.
        row: usize,
        /// Column index.
        col: usize,
    },
    /// An entry is negative.
    #[error("entry ({row}, {col}) is negative")]
    Negative {
        /// Row index.
        row: usize,
        /// Column index.
        col: usize,
    },
    /// A row the rule needs is all zeros.
    #[error("row {row} is all zeros")]
    ZeroRow {
        /// Row index.
        row: usize,
    },
    /// A column the rule needs is all zeros (nothing ever moves into that deme).
    #[error("column {col} is all zeros: nothing ever moves into deme {col}")]
    ZeroColumn {
        /// Column index.
        col: usize,
    },
    /// The local-retention probability is outside `[0, 1]`.
    #[error("the local-retention probability must lie in [0, 1]")]
    Retention,
}

/// A square row-stochastic matrix kept both dense and in compressed sparse row and column
/// form, so that callers can walk either the nonzeros of a row or those of a column.
#[derive(Debug, Clone, PartialEq)]
pub struct StochasticMatrix {
    m: usize,
    dense: Vec<f64>,
    row_start: Vec<usize>,
    row_col: Vec<usize>,
    row_val: Vec<f64>,
    col_start: Vec<usize>,
    col_row: Vec<usize>,
    col_val: Vec<f64>,
}

impl StochasticMatrix {
    /// Wraps `m x m` row-major entries that are already non-negative with rows summing to 1.
    /// Callers inside this crate guarantee that; use [`resolve`] for untrusted input.
    pub(crate) fn from_dense(m: usize, dense: Vec<f64>) -> Self {
        assert_eq!(dense.len(), m * m);
        let mut row_start = Vec::with_capacity(m + 1);
        let mut row_col = Vec::new();
        let mut row_val = Vec::new();
        row_start.push(0);
        for i in 0..m {
            for j in 0..m {
                let v = dense[i * m + j];
                if v != 0.0 {
                    row_col.push(j);
                    row_val.push(v);
                }
            }
            row_start.push(row_col.len());
        }
        let mut col_start = Vec::with_capacity(m + 1);
        let mut col_row = Vec::new();
        let mut col_val = Vec::new();
        col_start.push(0);
        for j in 0..m {
            for i in 0..m {
                let v = dense[i * m + j];
                if v != 0.0 {
                    col_row.push(i);
                    col_val.push(v);
                }
            }
            col_start.push(col_row.len());
        }
        Self {
            m,
            dense,
            row_start,
            row_col,
            row_val,
            col_start,
            col_row,
            col_val,
        }
    }

    /// Builds a row-stochastic matrix from rows of non-negative weights, dividing each row by
    /// its sum. Intended for tests and examples; fails on a row of zeros or a bad entry.
    pub fn from_weights(rows: &[Vec<f64>]) -> Result<Self, Vec<MatrixIssue>> {
        let m = rows.len();
        let mut issues = check_entries(rows, m);
        if !issues.is_empty() {
            return Err(issues);
        }
        let mut dense = vec![0.0; m * m];
        for (i, row) in rows.iter().enumerate() {
            let sum: f64 = row.iter().sum();
            if sum <= 0.0 {
                issues.push(MatrixIssue::ZeroRow { row: i });
                continue;
            }
            for (j, &v) in row.iter().enumerate() {
                dense[i * m + j] = v / sum;
            }
        }
        if issues.is_empty() {
            Ok(Self::from_dense(m, dense))
        } else {
            Err(issues)
        }
    }

    /// Size `m`.
    pub fn dim(&self) -> usize {
        self.m
    }

    /// Entry `(i, j)`.
    pub fn get(&self, i: usize, j: usize) -> f64 {
        self.dense[i * self.m + j]
    }

    /// Row-major dense entries.
    pub fn dense(&self) -> &[f64] {
        &self.dense
    }

    /// Nonzeros of row `i` as `(column, value)`.
    pub fn row(&self, i: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        let r = self.row_start[i]..self.row_start[i + 1];
        self.row_col[r.clone()]
            .iter()
            .copied()
            .zip(self.row_val[r].iter().copied())
    }

    /// Nonzeros of column `j` as `(row, value)`.
    pub fn col(&self, j: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        let r = self.col_start[j]..self.col_start[j + 1];
        self.col_row[r.clone()]
            .iter()
            .copied()
            .zip(self.col_val[r].iter().copied())
    }

    /// Number of stored nonzeros.
    pub fn nnz(&self) -> usize {
        self.row_val.len()
    }

    /// Left Perron vector `nu` with `nu M = nu`, `sum nu = 1`, by power iteration on the
    /// lazy chain `(I + M)/2` (which has the same stationary vector and is aperiodic).
    /// For a reducible matrix this returns the limit from the uniform start.
    pub fn stationary(&self) -> Vec<f64> {
        let m = self.m;
        let mut nu = vec![1.0 / m as f64; m];
        let mut next = vec![0.0; m];
        for _ in 0..1_000_000 {
            next.iter_mut().for_each(|x| *x = 0.0);
            for (i, &w) in nu.iter().enumerate() {
                for (j, v) in self.row(i) {
                    next[j] += 0.5 * w * v;
                }
                next[i] += 0.5 * w;
            }
            let sum: f64 = next.iter().sum();
            let mut diff = 0.0f64;
            for (a, b) in nu.iter_mut().zip(&next) {
                let b = b / sum;
                diff = diff.max((*a - b).abs());
                *a = b;
            }
            if diff < 1e-16 {
                break;
            }
        }
        nu
    }
}

fn check_entries(rows: &[Vec<f64>], m: usize) -> Vec<MatrixIssue> {
    let mut issues = Vec::new();
    if rows.len() != m {
        issues.push(MatrixIssue::RowCount {
            rows: rows.len(),
            expected: m,
        });
    }
    for (i, row) in rows.iter().enumerate() {
        if row.len() != m {
            issues.push(MatrixIssue::RowLength {
                row: i,
                len: row.len(),
                expected: m,
            });
        }
        for (j, &v) in row.iter().enumerate() {
            if !v.is_finite() {
                issues.push(MatrixIssue::NotFinite { row: i, col: j });
            } else if v < 0.0 {
                issues.push(MatrixIssue::Negative { row: i, col: j });
            }
        }
    }
    issues
}

/// Which of the two stochastic matrices an update rule needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Needed {
    /// The recruitment matrix `B` (death-birth, Wright-Fisher).
    Recruitment,
    /// The dispersal matrix `F` (birth-death).
    Dispersal,
}

/// The matrix a rule uses, with notes on what normalisation did.
#[derive(Debug, Clone, PartialEq)]
pub struct Resolved {
    /// The row-stochastic matrix (`B` or `F` as requested).
    pub matrix: StochasticMatrix,
    /// Rows of the sent matrix that were divided by their sum (weights, not probabilities).
    pub rescaled_rows: Vec<usize>,
    /// Rows of the derived matrix with no off-diagonal mass left to share under a stated
    /// retention (they keep everything locally).
    pub closed_rows: Vec<usize>,
}

/// Validates `input` for `sizes` and derives the matrix a rule needs. Collects every problem.
pub fn resolve(
    input: &MigrationInput,
    sizes: &[u64],
    needed: Needed,
) -> Result<Resolved, Vec<MatrixIssue>> {
    let m = sizes.len();
    let mut issues = check_entries(&input.rows, m);
    if let SelfFlows::Retention(p) = input.self_flows {
        if input.orientation == Orientation::Flows && !(0.0..=1.0).contains(&p) {
            issues.push(MatrixIssue::Retention);
        }
    }
    if !issues.is_empty() {
        return Err(issues);
    }
    let a = |i: usize, j: usize| input.rows[i][j];
    let mut rescaled_rows = Vec::new();
    // `w[i][j]`: unnormalised weights of the needed matrix; built per orientation.
    let mut w = vec![0.0; m * m];
    match (input.orientation, needed) {
        (Orientation::Recruitment, Needed::Recruitment)
        | (Orientation::Dispersal, Needed::Dispersal) => {
            for i in 0..m {
                let sum: f64 = input.rows[i].iter().sum();
                if sum <= 0.0 {
                    issues.push(MatrixIssue::ZeroRow { row: i });
                } else if (sum - 1.0).abs() > 1e-12 {
                    rescaled_rows.push(i);
                }
                for j in 0..m {
                    w[i * m + j] = a(i, j);
                }
            }
        }
        (Orientation::Flows, Needed::Dispersal) => {
            for i in 0..m {
                if input.rows[i].iter().sum::<f64>() <= 0.0 {
                    issues.push(MatrixIssue::ZeroRow { row: i });
                }
                for j in 0..m {
                    w[i * m + j] = a(i, j);
                }
            }
        }
        (Orientation::Flows, Needed::Recruitment) => {
            // B[i][j] ∝ C[j][i]: a vacancy in i is filled from where movements into i come.
            for i in 0..m {
                if (0..m).map(|j| a(j, i)).sum::<f64>() <= 0.0 {
                    issues.push(MatrixIssue::ZeroColumn { col: i });
                }
                for j in 0..m {
                    w[i * m + j] = a(j, i);
                }
            }
        }
        (Orientation::Dispersal, Needed::Recruitment) => {
            // B[i][j] ∝ n_j F[j][i], with F the row-normalised input.
            let f = normalised_rows(&input.rows, &mut issues, &mut rescaled_rows);
            for i in 0..m {
                for j in 0..m {
                    w[i * m + j] = sizes[j] as f64 * f[j * m + i];
                }
                if issues.is_empty() && (0..m).map(|j| w[i * m + j]).sum::<f64>() <= 0.0 {
                    issues.push(MatrixIssue::ZeroColumn { col: i });
                }
            }
        }
        (Orientation::Recruitment, Needed::Dispersal) => {
            // F[j][l] ∝ n_l B[l][j] / n_j; the 1/n_j is constant along row j.
            let b = normalised_rows(&input.rows, &mut issues, &mut rescaled_rows);
            for j in 0..m {
                for l in 0..m {
                    w[j * m + l] = sizes[l] as f64 * b[l * m + j];
                }
                if issues.is_empty() && (0..m).map(|l| w[j * m + l]).sum::<f64>() <= 0.0 {
                    issues.push(MatrixIssue::ZeroColumn { col: j });
                }
            }
        }
    }
    if !issues.is_empty() {
        return Err(issues);
    }
    let mut closed_rows = Vec::new();
    let retention = match (input.orientation, input.self_flows) {
        (Orientation::Flows, SelfFlows::Retention(p)) => Some(p),
        _ => None,
    };
    for i in 0..m {
        let row = &mut w[i * m..(i + 1) * m];
        if let Some(p) = retention {
            let off: f64 = (0..m).filter(|&j| j != i).map(|j| row[j]).sum();
            if off <= 0.0 {
                row.iter_mut().for_each(|x| *x = 0.0);
                row[i] = 1.0;
                closed_rows.push(i);
            } else {
                for (j, x) in row.iter_mut().enumerate() {
                    *x = if j == i { p } else { *x / off * (1.0 - p) };
                }
            }
        } else {
            let sum: f64 = row.iter().sum();
            if (sum - 1.0).abs() > 1e-12 {
                row.iter_mut().for_each(|x| *x /= sum);
            }
        }
    }
    Ok(Resolved {
        matrix: StochasticMatrix::from_dense(m, w),
        rescaled_rows,
        closed_rows,
    })
}

fn normalised_rows(
    rows: &[Vec<f64>],
    issues: &mut Vec<MatrixIssue>,
    rescaled: &mut Vec<usize>,
) -> Vec<f64> {
    let m = rows.len();
    let mut out = vec![0.0; m * m];
    for (i, row) in rows.iter().enumerate() {
        let sum: f64 = row.iter().sum();
        if sum <= 0.0 {
            issues.push(MatrixIssue::ZeroRow { row: i });
            continue;
        }
        if (sum - 1.0).abs() > 1e-12 {
            rescaled.push(i);
        }
        for (j, &v) in row.iter().enumerate() {
            out[i * m + j] = if (sum - 1.0).abs() > 1e-12 {
                v / sum
            } else {
                v
            };
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn input(orientation: Orientation, rows: Vec<Vec<f64>>) -> MigrationInput {
        MigrationInput {
            orientation,
            rows,
            self_flows: SelfFlows::Keep,
        }
    }

    #[test]
    fn flows_give_row_normalised_dispersal_and_column_normalised_recruitment() {
        let c = vec![
            vec![0.0, 40.0, 12.0],
            vec![35.0, 0.0, 5.0],
            vec![9.0, 4.0, 0.0],
        ];
        let sizes = [1200, 800, 950];
        let f = resolve(
            &input(Orientation::Flows, c.clone()),
            &sizes,
            Needed::Dispersal,
        )
        .unwrap()
        .matrix;
        assert!((f.get(0, 1) - 40.0 / 52.0).abs() < 1e-15);
        let b = resolve(&input(Orientation::Flows, c), &sizes, Needed::Recruitment)
            .unwrap()
            .matrix;
        // vacancies in deme 0 are filled from deme 1 (35) and deme 2 (9)
        assert!((b.get(0, 1) - 35.0 / 44.0).abs() < 1e-15);
        assert!((b.get(0, 2) - 9.0 / 44.0).abs() < 1e-15);
    }

    #[test]
    fn conservative_dispersal_and_recruitment_round_trip_through_sizes() {
        // The two size-based conversions are inverse to each other only when migration is
        // conservative (sum_j n_j F[j][l] = n_l); this F is built from flows whose column
        // sums equal the sizes (2, 3, 4).
        let flows = [[0.8, 0.7, 0.5], [0.6, 1.4, 1.0], [0.6, 0.9, 2.5]];
        let f: Vec<Vec<f64>> = flows
            .iter()
            .map(|row| row.iter().map(|x| x / row.iter().sum::<f64>()).collect())
            .collect();
        let sizes = [2, 3, 4];
        let b = resolve(
            &input(Orientation::Dispersal, f.clone()),
            &sizes,
            Needed::Recruitment,
        )
        .unwrap()
        .matrix;
        let b_rows: Vec<Vec<f64>> = (0..3)
            .map(|i| (0..3).map(|j| b.get(i, j)).collect())
            .collect();
        let back = resolve(
            &input(Orientation::Recruitment, b_rows),
            &sizes,
            Needed::Dispersal,
        )
        .unwrap()
        .matrix;
        for (i, row) in f.iter().enumerate() {
            for (j, &want) in row.iter().enumerate() {
                assert!((back.get(i, j) - want).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn every_bad_entry_is_reported() {
        let bad = vec![vec![0.5, -1.0], vec![f64::NAN, 0.0, 1.0]];
        let issues =
            resolve(&input(Orientation::Flows, bad), &[1, 1], Needed::Dispersal).unwrap_err();
        assert!(issues.contains(&MatrixIssue::Negative { row: 0, col: 1 }));
        assert!(issues.contains(&MatrixIssue::NotFinite { row: 1, col: 0 }));
        assert!(issues.contains(&MatrixIssue::RowLength {
            row: 1,
            len: 3,
            expected: 2
        }));
    }

    #[test]
    fn stated_retention_replaces_the_flows_diagonal() {
        let c = vec![
            vec![100.0, 30.0, 10.0],
            vec![5.0, 0.0, 5.0],
            vec![1.0, 1.0, 1.0],
        ];
        let mut inp = input(Orientation::Flows, c);
        inp.self_flows = SelfFlows::Retention(0.9);
        let f = resolve(&inp, &[1, 1, 1], Needed::Dispersal).unwrap().matrix;
        assert!((f.get(0, 0) - 0.9).abs() < 1e-15);
        assert!((f.get(0, 1) - 0.075).abs() < 1e-15);
        assert!((f.get(1, 0) - 0.05).abs() < 1e-15);
    }
}
