//! The effect of one more unit of a raw flow (`sensitivity::flow_effects`), checked against
//! central finite differences of the exact solver on the flows matrix itself: the perturbed
//! flows go through `migration::resolve` again, so the check covers the normalisation
//! (`self_flows: keep` and a stated retention) as well as the chain rule.

use demefix_science::exact::{self, ExactConfig};
use demefix_science::sensitivity::flow_effects;
use demefix_science::start::combine;
use demefix_science::{
    MigrationInput, Model, Orientation, Population, Rule, Scope, SelfFlows, Start,
};

/// Flows with a diagonal, so that `keep` and a stated retention give different kernels.
fn flows() -> Vec<Vec<f64>> {
    vec![
        vec![6.0, 4.0, 1.0],
        vec![3.0, 2.0, 2.0],
        vec![1.0, 5.0, 4.0],
    ]
}

fn model(rule: Rule, rows: Vec<Vec<f64>>, self_flows: SelfFlows) -> Model {
    let input = MigrationInput {
        orientation: Orientation::Flows,
        rows,
        self_flows,
    };
    let pop = Population::new(vec![3, 4, 2]).unwrap();
    Model::from_input(&pop, &input, rule, Scope::Deme, 0.2).unwrap()
}

fn fixation(model: &Model, start: Start) -> f64 {
    let solution = exact::solve(model, &ExactConfig::default()).unwrap();
    combine(&start.deme_weights(model), &solution.per_deme).fixation_probability
}

fn check(rule: Rule, self_flows: SelfFlows, start: Start) {
    let base = model(rule, flows(), self_flows);
    let weights = start.deme_weights(&base);
    let found = exact::sensitivity(&base, &ExactConfig::default(), &weights).unwrap();
    let links = found.d_fixation_probability.link_effects(rule);
    let retention = match self_flows {
        SelfFlows::Keep => None,
        SelfFlows::Retention(p) => Some(p),
    };
    let per_flow = flow_effects(&links, base.kernel(), &flows(), retention, rule);
    assert_eq!(per_flow.len(), links.len());
    assert_eq!(links.len(), 6, "every off-diagonal flow is a link");
    let step = 1e-4;
    for (link, &got) in links.iter().zip(&per_flow) {
        let at = |delta: f64| {
            let mut rows = flows();
            rows[link.from][link.to] += delta;
            fixation(&model(rule, rows, self_flows), start)
        };
        let fd = (at(step) - at(-step)) / (2.0 * step);
        // central difference: truncation O(step^2) relative, round-off ~1e-15 / step
        let tolerance = 1e-6 * got.abs() + 1e-10;
        assert!(
            (got - fd).abs() <= tolerance,
            "{rule:?} {self_flows:?} {start:?} flow {}->{}: chain rule {got:e}, finite \
             difference {fd:e}",
            link.from,
            link.to
        );
        assert!(got.abs() > 1e-6, "every flow matters here: {got:e}");
    }
}

#[test]
fn death_birth_flow_effects_match_finite_differences() {
    check(Rule::DeathBirth, SelfFlows::Keep, Start::Deme(0));
    check(Rule::DeathBirth, SelfFlows::Retention(0.3), Start::Uniform);
}

#[test]
fn birth_death_flow_effects_match_finite_differences() {
    check(Rule::BirthDeath, SelfFlows::Keep, Start::Uniform);
    check(Rule::BirthDeath, SelfFlows::Retention(0.3), Start::Deme(2));
}
