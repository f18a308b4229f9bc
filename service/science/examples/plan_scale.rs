//! Wall time of a greedy plan of link reductions on the fictional 100-deme population of the
//! scaling examples (sizes 10^3 to 10^6, sparse asymmetric flows, 2% of each deme's
//! recruitment from elsewhere, s = 0.02, uniform start; [`fictional`]): 10 steps, budget 50%
//! of the inter-deme flow, every candidate and step evaluated by paired ensembles on a
//! 2-thread pool, links ranked by the branching gradient (the exact chain does not fit).
//!
//! `cargo run --release -p demefix-science --example plan_scale -- [rule] [replicates] [shortlist]`
//!
//! `rule` is `wright_fisher` (default), `death_birth` or `birth_death` (the event rules run
//! the ensemble's automatic scheme); `replicates` per evaluation (default 10,000);
//! `shortlist` candidates per step (default 3). Each step costs `shortlist + 1` ensembles:
//! the candidates on the selection streams and the chosen cut on the job's streams.

mod fictional;

use demefix_science::ensemble::EnsembleConfig;
use demefix_science::whatif::{greedy_plan, EnsembleEvaluator, Estimate, PlanConfig};
use demefix_science::{Rule, Start};
use std::sync::atomic::AtomicBool;
use std::time::Instant;

fn show(e: &Estimate) -> String {
    match e.ci95 {
        Some((lo, hi)) => format!("{:.5} [{lo:.5}, {hi:.5}]", e.value),
        None => format!("{:.5}", e.value),
    }
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let rule = match args.first().map(String::as_str) {
        Some("death_birth") => Rule::DeathBirth,
        Some("birth_death") => Rule::BirthDeath,
        _ => Rule::WrightFisher,
    };
    let number = |i: usize, default: u64| {
        args.get(i)
            .and_then(|x| x.parse::<u64>().ok())
            .unwrap_or(default)
    };
    let replicates = number(1, 10_000);
    let shortlist = number(2, 3) as usize;
    let model = fictional::population(100, (3.0, 6.0), 0.98, rule, 0.02, 2026);
    println!(
        "{}: 100 demes, sizes {}..{}, N = {}, {} nonzeros, s = 0.02, {replicates} replicates per \
         evaluation, shortlist {shortlist}, load average {}",
        rule.as_str(),
        model.sizes().iter().min().unwrap(),
        model.sizes().iter().max().unwrap(),
        model.total(),
        model.kernel().nnz(),
        fictional::load_average()
    );
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .expect("thread pool");
    let cancel = AtomicBool::new(false);
    let config = EnsembleConfig {
        seed: 20261202,
        replicates,
        chunk_size: 1000,
        target_half_width: None,
        max_generations: 10_000_000,
        arrival_fractions: Vec::new(),
        ..EnsembleConfig::default()
    };
    let evaluator = EnsembleEvaluator::new(config, vec![Start::Uniform], &pool, &cancel);
    let plan_config = PlanConfig {
        budget: 0.5,
        max_steps: 10,
        shortlist,
    };
    let (t0, c0) = (Instant::now(), fictional::cpu_seconds());
    let plan = greedy_plan(&evaluator, &model, &plan_config, None).expect("plan");
    let (wall, cpu) = (t0.elapsed().as_secs_f64(), fictional::cpu_seconds() - c0);
    println!(
        "baseline {}, total flow {:.1} movements per generation",
        show(&plan.baseline),
        plan.total_flow
    );
    for (i, step) in plan.steps.iter().enumerate() {
        println!(
            "step {:>2}: {:>2} -> {:<2} cut {:.5}{} | after {} | change {} | budget used {:.4} \
             | ranked by {}",
            i + 1,
            step.link.from,
            step.link.to,
            step.amount,
            if step.closed { " (closed)" } else { "" },
            show(&step.after),
            show(&step.change),
            step.budget_used,
            step.ranked_by.as_str()
        );
    }
    println!(
        "stopped: {}; {} steps in {wall:.1} s wall, {cpu:.1} s CPU",
        plan.stop.as_str(),
        plan.steps.len()
    );
}
