//! `interventions` and `plan`: what-if scenarios on movement links and a greedy plan of link
//! reductions, read from a job document with every problem at its own pointer.
//!
//! This module owns the job schema of the two members, their defaults and limits, and the
//! checks that need the job's model (the link must exist in the rule's matrix; a scale-up must
//! fit in its row's retention; a scenario must not leave a deme fed forever by two separate
//! source groups). The meaning of a link and of each change is the science crate's
//! (`demefix_science::whatif::intervention`): a link `from -> to` is the movement of lineages,
//! one entry of the rule's matrix (`B[to][from]` for death-birth and Wright-Fisher,
//! `F[from][to]` for birth-death) whatever orientation the job sent, and every change moves
//! probability between the link and its row's local retention.
//!
//! ```json
//! "interventions": [
//!   {"name": "fewer-ferries", "changes": [
//!     {"action": "scale_link", "from": "quay", "to": "hill", "factor": 0.5},
//!     {"action": "close_link", "from": "hill", "to": "mill"},
//!     {"action": "scale_out_of", "deme": "quay", "factor": 0.2},
//!     {"action": "scale_into", "deme": "mill", "factor": 0}]}],
//! "plan": {"budget": 0.2, "steps": 10, "shortlist": 3, "s": 0.05}
//! ```
//!
//! Defaults: `plan.steps` [`DEFAULT_PLAN_STEPS`], `plan.shortlist` [`DEFAULT_SHORTLIST`],
//! `plan.s` the first value of `selection.s` (all written out in the accepted spec). Both
//! members are left out of the spec when absent (or, for `interventions`, empty), so jobs
//! without them keep their `spec_sha256`.

use super::walk::Walker;
use super::{is_valid_id, JobSpec, ResolvedMethod};
use crate::problem::Pointer;
use demefix_science::whatif::intervention::{self, stays_mixed, Change, InterventionError, Link};
use demefix_science::Model;
use serde::Serialize;
use serde_json::{Map, Value};

/// Most scenarios in `interventions`.
pub const MAX_INTERVENTIONS: usize = 50;
/// Most changes in one scenario.
pub const MAX_CHANGES: usize = 2_000;
/// Default `plan.steps`.
pub const DEFAULT_PLAN_STEPS: u64 = 10;
/// Largest `plan.steps`.
pub const MAX_PLAN_STEPS: u64 = 100;
/// Default `plan.shortlist`: candidates evaluated per step.
pub const DEFAULT_SHORTLIST: u64 = 3;
/// Largest `plan.shortlist`.
pub const MAX_SHORTLIST: u64 = 20;

/// One change of a scenario, as the job writes it (deme ids, not indices).
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "action", rename_all = "snake_case")]
pub enum ChangeSpec {
    /// Multiply the link `from -> to` by `factor`.
    ScaleLink {
        /// Deme the lineages leave.
        from: String,
        /// Deme they settle in.
        to: String,
        /// Finite, `>= 0`.
        factor: f64,
    },
    /// Close the link `from -> to`.
    CloseLink {
        /// Deme the lineages leave.
        from: String,
        /// Deme they settle in.
        to: String,
    },
    /// Multiply every link out of `deme` by `factor`.
    ScaleOutOf {
        /// The deme.
        deme: String,
        /// Finite, `>= 0`.
        factor: f64,
    },
    /// Multiply every link into `deme` by `factor`.
    ScaleInto {
        /// The deme.
        deme: String,
        /// Finite, `>= 0`.
        factor: f64,
    },
}

/// `interventions[]`: a named scenario.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InterventionSpec {
    /// Unique name, `[A-Za-z0-9_.-]{1,64}`.
    pub name: String,
    /// Applied in order, each to the result of the ones before.
    pub changes: Vec<ChangeSpec>,
}

/// `plan`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanSpec {
    /// Share of the total inter-deme flow the plan may cut, in `[0, 1]`.
    pub budget: f64,
    /// Most links cut.
    pub steps: u64,
    /// Candidates evaluated per step.
    pub shortlist: u64,
    /// The selection coefficient the plan is made for (one of `selection.s`).
    pub s: f64,
}

/// A validated scenario: its name and its changes in the science crate's terms.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    /// The name.
    pub name: String,
    /// The changes, deme ids resolved to indices.
    pub changes: Vec<Change>,
}

/// What a validated job asks beyond its results.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct WhatIfJob {
    /// The scenarios, in job order.
    pub scenarios: Vec<Scenario>,
    /// The plan, if asked for.
    pub plan: Option<PlanSpec>,
}

/// Reads `interventions` and `plan` of `top` (the job object). `ids` are the deme ids as
/// parsed (`None` where unreadable), `demes_known` whether the deme list could be read at all,
/// `sweep` the selection coefficients when readable. Problems are reported; what could be
/// read is returned.
pub(super) fn parse(
    w: &mut Walker,
    top: &Map<String, Value>,
    ids: &[Option<&str>],
    demes_known: bool,
    sweep: Option<&[f64]>,
) -> (Vec<InterventionSpec>, Option<PlanSpec>) {
    let root = Pointer::root();
    let interventions = top
        .get("interventions")
        .map(|v| scenarios(w, v, &root.key("interventions"), ids, demes_known))
        .unwrap_or_default();
    let plan = top
        .get("plan")
        .and_then(|v| plan(w, v, &root.key("plan"), sweep));
    (interventions, plan)
}

fn scenarios(
    w: &mut Walker,
    v: &Value,
    at: &Pointer,
    ids: &[Option<&str>],
    demes_known: bool,
) -> Vec<InterventionSpec> {
    let Some(list) = w.array(v, at) else {
        return Vec::new();
    };
    if list.len() > MAX_INTERVENTIONS {
        w.report(
            at,
            format!("at most {MAX_INTERVENTIONS} scenarios are supported"),
        );
        return Vec::new();
    }
    let mut out: Vec<InterventionSpec> = Vec::with_capacity(list.len());
    let mut names: Vec<(String, usize)> = Vec::with_capacity(list.len());
    for (i, item) in list.iter().enumerate() {
        let item_at = at.index(i);
        let Some(map) = w.object(item, &item_at, &["name", "changes"]) else {
            continue;
        };
        let name = w.required(map, &item_at, "name").and_then(|n| {
            let name_at = item_at.key("name");
            let n = w.string(n, &name_at)?;
            if !is_valid_id(n) {
                w.report(&name_at, "must match [A-Za-z0-9_.-]{1,64}");
                return None;
            }
            if let Some((_, first)) = names.iter().find(|(seen, _)| seen == n) {
                w.report(
                    &name_at,
                    format!("duplicate name `{n}` (also at /interventions/{first}/name)"),
                );
            } else {
                names.push((n.to_owned(), i));
            }
            Some(n.to_owned())
        });
        let changes = w.required(map, &item_at, "changes").and_then(|c| {
            let changes_at = item_at.key("changes");
            let list = w.array(c, &changes_at)?;
            if list.is_empty() {
                w.report(&changes_at, "needs at least one change");
                return None;
            }
            if list.len() > MAX_CHANGES {
                w.report(
                    &changes_at,
                    format!("at most {MAX_CHANGES} changes are supported"),
                );
                return None;
            }
            let parsed: Vec<Option<ChangeSpec>> = list
                .iter()
                .enumerate()
                .map(|(j, c)| change(w, c, &changes_at.index(j), ids, demes_known))
                .collect();
            parsed.into_iter().collect::<Option<Vec<_>>>()
        });
        if let (Some(name), Some(changes)) = (name, changes) {
            out.push(InterventionSpec { name, changes });
        }
    }
    out
}

const ACTIONS: &[&str] = &["scale_link", "close_link", "scale_out_of", "scale_into"];

fn change(
    w: &mut Walker,
    v: &Value,
    at: &Pointer,
    ids: &[Option<&str>],
    demes_known: bool,
) -> Option<ChangeSpec> {
    let Value::Object(map) = v else {
        w.report(at, "must be an object with an `action`");
        return None;
    };
    let action = w
        .required(map, at, "action")
        .and_then(|a| w.choice(a, &at.key("action"), ACTIONS))?;
    let fields: &[&str] = match action {
        "scale_link" => &["action", "from", "to", "factor"],
        "close_link" => &["action", "from", "to"],
        _ => &["action", "deme", "factor"],
    };
    w.object(v, at, fields)?;
    let before = w.count();
    let deme = |w: &mut Walker, key: &str| -> Option<String> {
        let id_at = at.key(key);
        let value = w.required(map, at, key)?;
        let id = w.string(value, &id_at)?;
        if demes_known && !ids.contains(&Some(id)) {
            w.report(
                &id_at,
                format!("`{id}` is not a deme id of population.demes"),
            );
        }
        Some(id.to_owned())
    };
    let factor = |w: &mut Walker| -> Option<f64> {
        let f_at = at.key("factor");
        let value = w.required(map, at, "factor")?;
        let x = w.number(value, &f_at)?;
        if x < 0.0 {
            w.report(
                &f_at,
                format!("{x} is negative: a factor must be >= 0 (0 closes)"),
            );
            return None;
        }
        Some(x)
    };
    let parsed = match action {
        "scale_link" | "close_link" => {
            let from = deme(w, "from");
            let to = deme(w, "to");
            let factor = (action == "scale_link").then(|| factor(w));
            if let (Some(a), Some(b)) = (&from, &to) {
                if a == b {
                    w.report(
                        &at.key("to"),
                        format!(
                            "a link joins two different demes; `{a}` to itself is its local \
                             retention"
                        ),
                    );
                }
            }
            match (from, to, factor) {
                (Some(from), Some(to), None) => Some(ChangeSpec::CloseLink { from, to }),
                (Some(from), Some(to), Some(Some(factor))) => {
                    Some(ChangeSpec::ScaleLink { from, to, factor })
                }
                _ => None,
            }
        }
        _ => {
            let deme = deme(w, "deme");
            let factor = factor(w);
            match (deme, factor, action) {
                (Some(deme), Some(factor), "scale_out_of") => {
                    Some(ChangeSpec::ScaleOutOf { deme, factor })
                }
                (Some(deme), Some(factor), _) => Some(ChangeSpec::ScaleInto { deme, factor }),
                _ => None,
            }
        }
    };
    (w.count() == before).then_some(parsed).flatten()
}

fn plan(w: &mut Walker, v: &Value, at: &Pointer, sweep: Option<&[f64]>) -> Option<PlanSpec> {
    let map = w.object(v, at, &["budget", "steps", "shortlist", "s"])?;
    let before = w.count();
    let budget = w.required(map, at, "budget").and_then(|b| {
        let b_at = at.key("budget");
        let x = w.number(b, &b_at)?;
        if (0.0..=1.0).contains(&x) {
            Some(x)
        } else {
            w.report(
                &b_at,
                format!(
                    "{x} is outside [0, 1]: the budget is a share of the total inter-deme flow"
                ),
            );
            None
        }
    });
    let whole = |w: &mut Walker, key: &str, max: u64, default: u64| -> u64 {
        map.get(key)
            .and_then(|v| w.whole(v, &at.key(key), 1, max))
            .unwrap_or(default)
    };
    let steps = whole(w, "steps", MAX_PLAN_STEPS, DEFAULT_PLAN_STEPS);
    let shortlist = whole(w, "shortlist", MAX_SHORTLIST, DEFAULT_SHORTLIST);
    let s = match (map.get("s"), sweep) {
        (None, Some(sweep)) => sweep.first().copied(),
        (None, None) => None,
        (Some(v), sweep) => {
            let s_at = at.key("s");
            let x = w.number(v, &s_at)?;
            let x = if x == 0.0 { 0.0 } else { x };
            match sweep {
                Some(sweep) if !sweep.contains(&x) => {
                    w.report(&s_at, format!("s = {x} is not one of selection.s"));
                    None
                }
                _ => Some(x),
            }
        }
    };
    match (budget, s) {
        (Some(budget), Some(s)) if w.count() == before => Some(PlanSpec {
            budget,
            steps,
            shortlist,
            s,
        }),
        _ => None,
    }
}

/// Checks the parsed members against the job's model and method (module docs) and returns
/// the what-if part of the validated job; problems are reported.
pub(super) fn check(
    w: &mut Walker,
    spec: &JobSpec,
    model: &Model,
    method: ResolvedMethod,
) -> WhatIfJob {
    let root = Pointer::root();
    let index = |id: &str| {
        spec.population
            .demes
            .iter()
            .position(|d| d.id == id)
            .expect("deme ids were checked")
    };
    if method == ResolvedMethod::Approximation {
        for (member, given) in [
            ("interventions", !spec.interventions.is_empty()),
            ("plan", spec.plan.is_some()),
        ] {
            if given {
                w.report(
                    &root.key(member),
                    format!(
                        "`{member}` is evaluated by the exact method or by ensembles: use \
                         method.kind `exact`, `ensemble` or `auto`"
                    ),
                );
            }
        }
    }
    let baseline_mixed = stays_mixed(model).is_some();
    let mut scenarios = Vec::with_capacity(spec.interventions.len());
    for (i, scenario) in spec.interventions.iter().enumerate() {
        let at = root.key("interventions").index(i);
        let changes: Vec<Change> = scenario
            .changes
            .iter()
            .map(|c| match c {
                ChangeSpec::ScaleLink { from, to, factor } => Change::ScaleLink {
                    link: Link {
                        from: index(from),
                        to: index(to),
                    },
                    factor: *factor,
                },
                ChangeSpec::CloseLink { from, to } => Change::CloseLink(Link {
                    from: index(from),
                    to: index(to),
                }),
                ChangeSpec::ScaleOutOf { deme, factor } => Change::ScaleOutOf {
                    deme: index(deme),
                    factor: *factor,
                },
                ChangeSpec::ScaleInto { deme, factor } => Change::ScaleInto {
                    deme: index(deme),
                    factor: *factor,
                },
            })
            .collect();
        match intervention::scenario(model, &changes) {
            Ok(changed) => {
                if let (false, Some(mixed)) = (baseline_mixed, stays_mixed(&changed)) {
                    let id = |d: usize| spec.population.demes[d].id.as_str();
                    w.report(
                        &at,
                        format!(
                            "after these changes deme `{}` is fed forever by two separate \
                             groups of demes (through `{}` and `{}`) that never exchange \
                             lineages, so the chain never settles: keep a link between the \
                             groups",
                            id(mixed.deme),
                            id(mixed.sources.0),
                            id(mixed.sources.1)
                        ),
                    );
                }
            }
            Err(errors) => {
                for (j, e) in errors {
                    report_change(w, &at.key("changes").index(j), &e, spec);
                }
            }
        }
        scenarios.push(Scenario {
            name: scenario.name.clone(),
            changes,
        });
    }
    WhatIfJob {
        scenarios,
        plan: spec.plan.clone(),
    }
}

fn report_change(w: &mut Walker, at: &Pointer, e: &InterventionError, spec: &JobSpec) {
    let id = |d: usize| spec.population.demes.get(d).map_or("?", |x| x.id.as_str());
    let matrix = match spec.dynamics.rule {
        demefix_science::Rule::BirthDeath => "dispersal matrix F",
        _ => "recruitment matrix B",
    };
    match e {
        InterventionError::NoSuchLink { link } => w.report(
            at,
            format!(
                "there is no link from `{}` to `{}`: lineages never move that way in the \
                 rule's {matrix}",
                id(link.from),
                id(link.to)
            ),
        ),
        InterventionError::RetentionExhausted {
            needed, available, ..
        } => w.report(
            &at.key("factor"),
            format!(
                "scaling up needs {needed:.6} more probability on the links than the local \
                 retention holds ({available:.6}) in the rule's {matrix}"
            ),
        ),
        other => w.report(at, other.to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::super::{validate, Limits};
    use serde_json::{json, Value};

    fn job(extra: Value) -> Value {
        let mut v = json!({
            "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 4}, {"id": "c", "size": 2}]},
            "migration": {"orientation": "flows", "matrix": [[0, 4, 0], [3, 0, 2], [1, 1, 0]]},
            "dynamics": {"rule": "death_birth"},
            "selection": {"s": [0.1, 0.2]},
            "method": {"seed": 7}
        });
        for (k, x) in extra.as_object().unwrap() {
            v[k] = x.clone();
        }
        v
    }

    fn pointers(v: &Value) -> Vec<(String, String)> {
        match validate(v, &Limits::default()) {
            Ok(_) => panic!("expected problems"),
            Err(p) => p.into_iter().map(|p| (p.pointer, p.detail)).collect(),
        }
    }

    #[test]
    fn scenarios_and_plan_are_read_with_defaults_written_out() {
        let v = job(json!({
            "interventions": [{"name": "x", "changes": [
                {"action": "scale_link", "from": "a", "to": "b", "factor": 0.5},
                {"action": "close_link", "from": "c", "to": "a"},
                {"action": "scale_into", "deme": "c", "factor": 0}]}],
            "plan": {"budget": 0.25}
        }));
        let job = validate(&v, &Limits::default()).unwrap();
        let spec = serde_json::to_value(job.spec()).unwrap();
        assert_eq!(
            spec["plan"],
            json!({"budget": 0.25, "steps": 10, "shortlist": 3, "s": 0.1})
        );
        assert_eq!(
            spec["interventions"][0]["changes"][1],
            json!({"action": "close_link", "from": "c", "to": "a"})
        );
        assert_eq!(job.whatif().scenarios[0].changes.len(), 3);
        // Absent members stay absent.
        let plain = validate(&job_without(), &Limits::default()).unwrap();
        let spec = serde_json::to_value(plain.spec()).unwrap();
        assert!(spec.get("interventions").is_none() && spec.get("plan").is_none());
    }

    fn job_without() -> Value {
        job(json!({}))
    }

    #[test]
    fn every_bad_scenario_and_plan_member_is_reported_with_its_pointer() {
        let v = job(json!({
            "interventions": [
                {"name": "x", "changes": [
                    {"action": "scale_link", "from": "a", "to": "zz", "factor": 0.5},
                    {"action": "scale_out_of", "deme": "b", "factor": -1},
                    {"action": "close_link", "from": "b", "to": "b"},
                    {"action": "teleport", "deme": "a"}]},
                {"name": "x", "changes": []}
            ],
            "plan": {"budget": 1.5, "steps": 0, "s": 0.3}
        }));
        let found = pointers(&v);
        let at: Vec<&str> = found.iter().map(|(p, _)| p.as_str()).collect();
        for want in [
            "/interventions/0/changes/0/to",
            "/interventions/0/changes/1/factor",
            "/interventions/0/changes/2/to",
            "/interventions/0/changes/3/action",
            "/interventions/1/name",
            "/interventions/1/changes",
            "/plan/budget",
            "/plan/steps",
            "/plan/s",
        ] {
            assert!(at.contains(&want), "{want} missing from {found:#?}");
        }
    }

    #[test]
    fn links_missing_from_the_matrix_and_too_large_scale_ups_are_reported() {
        // Flows a -> c are 0, so death-birth's B[c][a] is 0: no link a -> c.
        let v = job(json!({
            "interventions": [{"name": "x", "changes": [
                {"action": "close_link", "from": "a", "to": "c"},
                {"action": "scale_into", "deme": "a", "factor": 3}]}]
        }));
        let found = pointers(&v);
        assert_eq!(found[0].0, "/interventions/0/changes/0");
        assert!(found[0].1.contains("no link from `a` to `c`"), "{found:?}");
        // Flows have no diagonal here, so no retention to scale up from.
        assert_eq!(found[1].0, "/interventions/0/changes/1/factor");
    }

    #[test]
    fn a_scenario_that_would_never_settle_is_rejected() {
        // Closing every link into `a` and into `b` leaves each recruiting only from itself,
        // while `c` still recruits from both: a variant fixed in `a` and residents in `b`
        // would keep `c` mixed forever.
        let v = job(json!({
            "migration": {"orientation": "flows", "matrix": [[5, 4, 1], [3, 5, 2], [1, 1, 5]]},
            "interventions": [{"name": "x", "changes": [
                {"action": "scale_into", "deme": "a", "factor": 0},
                {"action": "scale_into", "deme": "b", "factor": 0}]}]
        }));
        let found = pointers(&v);
        assert_eq!(found.len(), 1, "{found:?}");
        assert_eq!(found[0].0, "/interventions/0");
        assert!(found[0].1.contains("deme `c`"), "{found:?}");
    }

    #[test]
    fn approximation_jobs_cannot_evaluate_what_ifs() {
        let mut v = job(json!({"plan": {"budget": 0.1}}));
        v["method"] = json!({"kind": "approximation"});
        let found = pointers(&v);
        assert_eq!(found[0].0, "/plan");
    }
}
