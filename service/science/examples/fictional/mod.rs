//! The fictional populations of the scaling examples (shared by `ensemble_scale` and
//! `plan_scale`): deme sizes spread log-uniformly, a sparse asymmetric flow matrix of our own
//! generation (every deme sends to the next one on a ring and to a few others, random
//! weights, a stated share of each deme's recruitment kept at home), seeded, so every run
//! builds the same population; and the process's CPU time and the load average.
#![allow(dead_code)] // each example uses only some of these

use demefix_science::{MigrationInput, Model, Orientation, Population, Rule, Scope, SelfFlows};

/// A small deterministic generator for the fictional populations (not the simulation's
/// streams).
pub struct Lcg(pub u64);

impl Lcg {
    pub fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// `m` sizes `10^e`, `e` evenly spaced over `[lo, hi]`, shuffled.
pub fn sizes(m: usize, lo: f64, hi: f64, rng: &mut Lcg) -> Vec<u64> {
    let mut sizes: Vec<u64> = (0..m)
        .map(|i| {
            let e = lo + (hi - lo) * i as f64 / (m - 1).max(1) as f64;
            10f64.powf(e).round() as u64
        })
        .collect();
    for i in (1..m).rev() {
        let j = ((rng.next() * (i + 1) as f64) as usize).min(i);
        sizes.swap(i, j);
    }
    sizes
}

/// Flows `C[j][l]` from `j` to `l`: to the next deme on a ring, and to `links` others.
pub fn flows(m: usize, links: (usize, usize), rng: &mut Lcg) -> Vec<Vec<f64>> {
    (0..m)
        .map(|j| {
            let mut row = vec![0.0; m];
            row[(j + 1) % m] = 0.5 + rng.next();
            let extra = links.0 + (rng.next() * (links.1 - links.0 + 1) as f64) as usize;
            for _ in 0..extra {
                let l = ((rng.next() * m as f64) as usize).min(m - 1);
                if l != j {
                    row[l] += 0.1 + rng.next();
                }
            }
            row
        })
        .collect()
}

/// A population of `m` demes (sizes `10^lo .. 10^hi`) with `retention` of each deme's
/// recruitment (or dispersal) kept at home.
pub fn population(
    m: usize,
    (lo, hi): (f64, f64),
    retention: f64,
    rule: Rule,
    s: f64,
    seed: u64,
) -> Model {
    let mut rng = Lcg(seed);
    let n = sizes(m, lo, hi, &mut rng);
    let links = if m > 8 { (3, 5) } else { (1, 2) };
    let input = MigrationInput {
        orientation: Orientation::Flows,
        rows: flows(m, links, &mut rng),
        self_flows: SelfFlows::Retention(retention),
    };
    let pop = Population::new(n).expect("sizes");
    Model::from_input(&pop, &input, rule, Scope::Deme, s).expect("model")
}

/// CPU seconds used by this process so far (user + system, Linux clock ticks of 1/100 s).
pub fn cpu_seconds() -> f64 {
    let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
    let after = stat.rsplit_once(')').map_or("", |(_, rest)| rest);
    let fields: Vec<&str> = after.split_whitespace().collect();
    let ticks = |i: usize| {
        fields
            .get(i)
            .and_then(|x| x.parse::<f64>().ok())
            .unwrap_or(0.0)
    };
    (ticks(11) + ticks(12)) / 100.0
}

/// The 1-, 5- and 15-minute load averages of the machine.
pub fn load_average() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_else(|_| "unknown".into())
}
