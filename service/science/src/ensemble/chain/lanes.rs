//! Several replicates stepped in turn on one thread (the small path of the event scheme).
//!
//! One state change of the jump chain is a chain of dependent floating-point steps (sum of
//! the rates, a logarithm, a division, the scan that picks the change, the update of every
//! rate), so a single replicate leaves most of a core's execution units idle while it waits
//! on latency. Stepping [`LANES`] independent replicates in turn lets the processor overlap
//! their chains. Each replicate still draws only from its own stream and runs exactly the
//! same operations in the same order as when run alone, so every outcome is bit-identical
//! to [`Replicate::run`]; only the wall time changes.
//!
//! It applies where a replicate never leaves the small path: death-birth or birth-death on
//! at most [`super::SMALL_MAX_DEMES`] demes with the dense layout, under the event scheme
//! (the generation scheme may hand a replicate over, which the lanes do not follow).

use super::small::{Small, SmallTables};
use super::{
    End, Kind, Replicate, ReplicateOutcome, Status, Tables, BD, DB_DEME, DB_NEIGHBOURHOOD,
};
use rand::Rng;
use std::ops::Range;

/// Replicates stepped in turn by one thread.
pub const LANES: usize = 2;

impl Tables {
    /// The small-path capacity when replicates of these tables can run in lanes.
    pub(crate) fn lane_capacity(&self) -> Option<usize> {
        let m = self.demes();
        let jump = self.kind != Kind::WrightFisher;
        (jump
            && self.rebuild_all
            && self.leap_from == u64::MAX
            && (1..=super::SMALL_MAX_DEMES).contains(&m))
        .then_some(m + (m & 1))
    }
}

/// One lane: the replicate index, its stream and its small-path state.
struct Lane<R, const C: usize> {
    q: u64,
    rng: R,
    s: Small<C>,
}

/// Runs replicates `range` in [`LANES`] lanes (see the module docs); `reps` are scratch
/// replicates of these tables and `rng_for(q)` is replicate `q`'s stream. Outcomes come back
/// in index order.
pub(crate) fn run_in_lanes<R: Rng, F: Fn(u64) -> R>(
    t: &Tables,
    range: Range<u64>,
    reps: &mut [Replicate; LANES],
    rng_for: &F,
) -> Vec<ReplicateOutcome> {
    let cap = t.lane_capacity().expect("tables that run in lanes");
    macro_rules! by_capacity {
        ($k:expr) => {
            match cap {
                2 => run_lanes::<R, F, { $k }, 2>(t, range, reps, rng_for),
                4 => run_lanes::<R, F, { $k }, 4>(t, range, reps, rng_for),
                6 => run_lanes::<R, F, { $k }, 6>(t, range, reps, rng_for),
                8 => run_lanes::<R, F, { $k }, 8>(t, range, reps, rng_for),
                10 => run_lanes::<R, F, { $k }, 10>(t, range, reps, rng_for),
                12 => run_lanes::<R, F, { $k }, 12>(t, range, reps, rng_for),
                14 => run_lanes::<R, F, { $k }, 14>(t, range, reps, rng_for),
                _ => run_lanes::<R, F, { $k }, 16>(t, range, reps, rng_for),
            }
        };
    }
    match t.code() {
        DB_DEME => by_capacity!(DB_DEME),
        DB_NEIGHBOURHOOD => by_capacity!(DB_NEIGHBOURHOOD),
        _ => by_capacity!(BD),
    }
}

fn run_lanes<R: Rng, F: Fn(u64) -> R, const K: u8, const C: usize>(
    t: &Tables,
    range: Range<u64>,
    reps: &mut [Replicate; LANES],
    rng_for: &F,
) -> Vec<ReplicateOutcome> {
    let st = SmallTables::<C>::new(t);
    let first = range.start;
    let mut out: Vec<Option<ReplicateOutcome>> = vec![None; (range.end - range.start) as usize];
    let mut next = range.start;
    let end = range.end;
    // starts the next replicate of the range in `rep`; one already fixed at its start (a
    // population of one) is finished at once
    let mut begin = |rep: &mut Replicate, out: &mut Vec<Option<ReplicateOutcome>>| loop {
        if next >= end {
            return None;
        }
        let q = next;
        next += 1;
        let mut rng = rng_for(q);
        let start = t.draw_start(&mut rng);
        rep.reset(t, start);
        if rep.variants == t.total {
            out[(q - first) as usize] = Some(rep.outcome(End::Fixed));
            continue;
        }
        let s = Small::<C>::load(rep, t);
        return Some(Lane { q, rng, s });
    };
    let mut lanes: [Option<Lane<R, C>>; LANES] = std::array::from_fn(|_| None);
    for (lane, rep) in lanes.iter_mut().zip(reps.iter_mut()) {
        *lane = begin(rep, &mut out);
    }
    while lanes.iter().any(Option::is_some) {
        for (lane, rep) in lanes.iter_mut().zip(reps.iter_mut()) {
            let Some(run) = lane.as_mut() else { continue };
            if let Status::Done(e) = rep.small_step::<R, K, C>(&mut run.s, &st, t, &mut run.rng) {
                rep.finish_small(&run.s, t);
                out[(run.q - first) as usize] = Some(rep.outcome(e));
                *lane = begin(rep, &mut out);
            }
        }
    }
    out.into_iter()
        .map(|o| o.expect("every replicate of the range ran"))
        .collect()
}
