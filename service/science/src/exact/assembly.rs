//! Assembly of the sparse system `A = I - Q` of the death-birth and birth-death chains.
//!
//! One event changes one count `k_i` by ±1 with the probabilities of
//! [`Model::event_probabilities`]; a null event leaves `k` unchanged. Self-loops are
//! eliminated: row `s` of `A` has the total leaving probability on the diagonal and `-P(s, s')`
//! off it, which is `I - Q` of the chain with the null events divided out; the fixation
//! probabilities and the mean numbers of events it gives are those of the original chain.
//!
//! A transient state with no way out (every deme monomorphic and no flow from variant demes to
//! resident ones or back) is a frozen absorbing state: its row becomes the identity row with
//! right-hand side 0, so it has fixation probability 0 and absorption time 0.

use super::space::StateSpace;
use crate::model::Model;
use rayon::prelude::*;

/// `A = I - Q` over the transient states (system index = state index - 1), kept as its
/// diagonal plus the off-diagonal transition probabilities in compressed rows.
#[derive(Debug, Clone)]
pub(crate) struct EventSystem {
    /// Leaving probability of each transient state (1 for frozen states).
    pub(crate) diag: Vec<f64>,
    /// Row starts of the off-diagonal entries (length `n + 1`).
    pub(crate) row_start: Vec<usize>,
    /// Column (system index) of each off-diagonal entry, ascending within a row.
    pub(crate) col: Vec<u32>,
    /// Transition probability of each off-diagonal entry (`A` holds its negative).
    pub(crate) prob: Vec<f64>,
    /// One-step probability into the fixation state.
    pub(crate) to_fixation: Vec<f64>,
    /// Whether each transient state is frozen.
    pub(crate) frozen: Vec<bool>,
}

/// Rows assembled by one parallel task.
#[derive(Default)]
struct Block {
    len: Vec<u32>,
    col: Vec<u32>,
    prob: Vec<f64>,
    diag: Vec<f64>,
    to_fixation: Vec<f64>,
}

/// Rows per parallel task.
const BLOCK_ROWS: usize = 8192;

impl EventSystem {
    /// Assembles the system of a death-birth or birth-death `model` over `space`. The space must
    /// have fewer than `2^32` states (checked by the caller).
    pub(crate) fn assemble(model: &Model, space: &StateSpace) -> Self {
        let n = space.transient();
        let starts: Vec<usize> = (0..n).step_by(BLOCK_ROWS).collect();
        let blocks: Vec<Block> = starts
            .par_iter()
            .map(|&first| assemble_block(model, space, first, (first + BLOCK_ROWS).min(n)))
            .collect();
        let nnz: usize = blocks.iter().map(|b| b.col.len()).sum();
        let mut system = Self {
            diag: Vec::with_capacity(n),
            row_start: Vec::with_capacity(n + 1),
            col: Vec::with_capacity(nnz),
            prob: Vec::with_capacity(nnz),
            to_fixation: Vec::with_capacity(n),
            frozen: Vec::with_capacity(n),
        };
        system.row_start.push(0);
        for block in blocks {
            let mut end = system.col.len();
            for &len in &block.len {
                end += len as usize;
                system.row_start.push(end);
            }
            system.col.extend_from_slice(&block.col);
            system.prob.extend_from_slice(&block.prob);
            for &d in &block.diag {
                system.frozen.push(d == 0.0);
                system.diag.push(if d == 0.0 { 1.0 } else { d });
            }
            system.to_fixation.extend_from_slice(&block.to_fixation);
        }
        system
    }

    /// `A^T` in the same form (diagonal and frozen flags unchanged; right-hand side 0).
    pub(crate) fn transposed(&self) -> Self {
        let n = self.dim();
        let mut count = vec![0usize; n + 1];
        for &c in &self.col {
            count[c as usize + 1] += 1;
        }
        for i in 0..n {
            count[i + 1] += count[i];
        }
        let row_start = count.clone();
        let mut next = count;
        let mut col = vec![0u32; self.col.len()];
        let mut prob = vec![0.0; self.prob.len()];
        // rows visited in ascending order, so each transposed row's columns ascend
        for row in 0..n {
            for e in self.row_start[row]..self.row_start[row + 1] {
                let c = self.col[e] as usize;
                col[next[c]] = row as u32;
                prob[next[c]] = self.prob[e];
                next[c] += 1;
            }
        }
        Self {
            diag: self.diag.clone(),
            row_start,
            col,
            prob,
            to_fixation: vec![0.0; n],
            frozen: self.frozen.clone(),
        }
    }

    /// Number of unknowns.
    pub(crate) fn dim(&self) -> usize {
        self.diag.len()
    }

    /// Stored nonzeros of `A` (diagonal included).
    pub(crate) fn nonzeros(&self) -> usize {
        self.col.len() + self.diag.len()
    }

    /// `out = A x` for the rows `first .. first + out.len()`.
    pub(crate) fn apply_rows(&self, first: usize, x: &[f64], out: &mut [f64]) {
        for (offset, o) in out.iter_mut().enumerate() {
            let row = first + offset;
            let range = self.row_start[row]..self.row_start[row + 1];
            let mut acc = self.diag[row] * x[row];
            for (&c, &p) in self.col[range.clone()].iter().zip(&self.prob[range]) {
                acc -= p * x[c as usize];
            }
            *o = acc;
        }
    }

    /// `out = A x`, in parallel over blocks of rows.
    pub(crate) fn apply(&self, x: &[f64], out: &mut [f64]) {
        out.par_chunks_mut(BLOCK_ROWS)
            .enumerate()
            .for_each(|(b, chunk)| self.apply_rows(b * BLOCK_ROWS, x, chunk));
    }

    /// `out = b - A x`, in parallel over blocks of rows when `parallel`.
    pub(crate) fn residual_into(&self, x: &[f64], b: &[f64], out: &mut [f64], parallel: bool) {
        let rows = |(block, chunk): (usize, &mut [f64])| {
            let first = block * BLOCK_ROWS;
            self.apply_rows(first, x, chunk);
            chunk
                .iter_mut()
                .zip(&b[first..])
                .for_each(|(o, &bb)| *o = bb - *o);
        };
        if parallel {
            out.par_chunks_mut(BLOCK_ROWS).enumerate().for_each(rows);
        } else {
            out.chunks_mut(BLOCK_ROWS).enumerate().for_each(rows);
        }
    }

    /// Relative residual `||b - A x|| / ||b||` (0 when `b = 0` and `x` solves exactly).
    pub(crate) fn relative_residual(&self, x: &[f64], b: &[f64]) -> f64 {
        let mut ax = vec![0.0; self.dim()];
        self.apply(x, &mut ax);
        relative_residual(&ax, b)
    }
}

/// `||b - ax|| / ||b||`, or `||b - ax||` when `b = 0`.
pub(crate) fn relative_residual(ax: &[f64], b: &[f64]) -> f64 {
    let (mut r2, mut b2) = (0.0f64, 0.0f64);
    for (&a, &bb) in ax.iter().zip(b) {
        r2 += (bb - a) * (bb - a);
        b2 += bb * bb;
    }
    if b2 == 0.0 {
        r2.sqrt()
    } else {
        (r2 / b2).sqrt()
    }
}

/// Assembles system rows `first..end` (state indices `first + 1 .. end + 1`).
fn assemble_block(model: &Model, space: &StateSpace, first: usize, end: usize) -> Block {
    let m = space.demes();
    let fixed = space.fixed();
    let rows = end - first;
    let mut block = Block {
        len: Vec::with_capacity(rows),
        col: Vec::with_capacity(rows * m),
        prob: Vec::with_capacity(rows * m),
        diag: Vec::with_capacity(rows),
        to_fixation: Vec::with_capacity(rows),
    };
    // Demes by descending stride, so that down-moves come out in ascending column order.
    let mut by_stride: Vec<usize> = (0..m).collect();
    by_stride.sort_by_key(|&i| std::cmp::Reverse(space.stride(i)));
    let mut k = vec![0u64; m];
    let (mut up, mut down) = (vec![0.0; m], vec![0.0; m]);
    space.decode(first + 1, &mut k);
    for s in first + 1..end + 1 {
        model.event_probabilities(&k, &mut up, &mut down);
        let before = block.col.len();
        let mut leave = 0.0;
        let mut to_fix = 0.0;
        for &i in &by_stride {
            if down[i] > 0.0 {
                leave += down[i];
                let target = s - space.stride(i);
                if target != 0 {
                    block.col.push((target - 1) as u32);
                    block.prob.push(down[i]);
                }
            }
        }
        for &i in by_stride.iter().rev() {
            if up[i] > 0.0 {
                leave += up[i];
                let target = s + space.stride(i);
                if target == fixed {
                    to_fix += up[i];
                } else {
                    block.col.push((target - 1) as u32);
                    block.prob.push(up[i]);
                }
            }
        }
        block.len.push((block.col.len() - before) as u32);
        block.diag.push(leave);
        block.to_fixation.push(to_fix);
        space.advance(&mut k);
    }
    block
}
