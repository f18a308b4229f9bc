//! The job document: parsing untrusted JSON into a [`ValidatedJob`], collecting every problem.
//!
//! This module owns the job schema of `api.md` ("A job"), its defaults, and every rule a job
//! must satisfy before any computation starts. [`validate`] walks a `serde_json::Value` by
//! hand, so that each problem is reported at its own RFC 6901 pointer and none is hidden
//! behind the first; on success it returns science types (population, model, starts, the
//! method to use) together with the normalised [`JobSpec`]: the job exactly as accepted, with
//! defaults filled in. Matrix checks are those of `demefix_science::migration::resolve`; this
//! module only maps their [`MatrixIssue`]s to pointers.
//!
//! Normalisation: `selection.s` is always a list; `matrix_csv` and `matrix_ref` become the
//! numeric `matrix` (so the spec hash depends on the matrix, never on how it was sent, and a
//! stored spec can be recomputed without the store); `-0.0` becomes `0.0`; every
//! optional member with a default is written out. Defaults: `selection.scope` `deme`,
//! `migration.self_flows` `keep`, `start` `["uniform"]`, `method.kind` `auto`,
//! `method.replicates` [`DEFAULT_REPLICATES`], `method.chunk_size` [`DEFAULT_CHUNK_SIZE`],
//! `method.max_generations` [`DEFAULT_MAX_GENERATIONS`], `outputs.times` `true`,
//! `outputs.arrival_fractions` `[]`, `outputs.sensitivity` `false`. `method.approximations`
//! has no written default: absent, every approximation is computed in
//! [`approximations::DEFAULT_ORDER`] and the member stays absent from the spec.
//!
//! `notify_url` (where the service POSTs a notice when the run finishes) is delivery
//! metadata, not part of the computation: it is validated here ([`crate::http_client::HttpUrl`],
//! `http://` only) and kept on the [`ValidatedJob`] ([`ValidatedJob::notify_url`]), but it is
//! not a member of [`JobSpec`], so it never enters `spec_sha256` nor result reuse.

pub mod approximations;
pub mod csv;
mod stored;
mod walk;
pub mod whatif;

pub use approximations::ApproximationName;
pub use stored::{
    is_sha256_hex, matrix_csv_text, matrix_document, matrix_ref, sha256_of_ref, FetchedMatrix,
    MatrixRefs, NoStoredMatrices, RefLookup, REF_PREFIX,
};

use crate::problem::{Pointer, Problem};
use demefix_science::ensemble::{EnsembleConfig, Scheme};
use demefix_science::exact::{self, ExactConfig, ExactError};
use demefix_science::migration::{self, Needed, Resolved};
use demefix_science::whatif::intervention::stays_mixed;
use demefix_science::{
    reach, MatrixIssue, MigrationInput, Model, Orientation, Population, Rule, Scope, SelfFlows,
    Start,
};
use serde::{Serialize, Serializer};
use serde_json::{Map, Value};
use std::collections::BTreeMap;
use walk::{type_name, Walker, MAX_EXACT_INTEGER};

/// Default `method.replicates`: the most replicates an ensemble runs.
pub const DEFAULT_REPLICATES: u64 = 10_000;
/// Default `method.chunk_size`: replicates per chunk (unit of progress and early stopping).
pub const DEFAULT_CHUNK_SIZE: u64 = 1_000;
/// Default `method.max_generations`: a replicate still unabsorbed after this many
/// generations counts as unresolved.
pub const DEFAULT_MAX_GENERATIONS: u64 = 10_000_000;
/// Largest `method.replicates` and `method.chunk_size`.
pub const MAX_REPLICATES: u64 = 1_000_000_000;
/// Largest number of demes (the dense matrix has `m * m` entries).
pub const MAX_DEMES: usize = 2_000;
/// Largest length of `label`, in characters.
pub const MAX_LABEL_CHARS: usize = 500;
/// Largest number of values in a `selection.s` sweep.
pub const MAX_SWEEP: usize = 1_000;

const TOP_FIELDS: &[&str] = &[
    "label",
    "series",
    "as_of",
    "population",
    "migration",
    "dynamics",
    "selection",
    "start",
    "method",
    "outputs",
    "interventions",
    "plan",
    "notify_url",
];

/// The requested method.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum MethodKind {
    /// The exact Markov chain over count vectors.
    Exact,
    /// A seeded simulation ensemble.
    Ensemble,
    /// Published screening approximations (`method.approximations`), the primary one chosen
    /// per `s` by [`approximations::DEFAULT_ORDER`] or the job's own order.
    Approximation,
    /// Exact when the state space fits the limit, else ensemble.
    Auto,
}

/// The method a validated job will run (`auto` resolved by the state-space size).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ResolvedMethod {
    /// The exact chain, with this many count vectors.
    Exact {
        /// Number of count vectors.
        states: u64,
    },
    /// A simulation ensemble per `(s, start)`.
    Ensemble,
    /// The screening approximations.
    Approximation,
}

/// `population.demes[]`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct DemeSpec {
    /// Unique id, `[A-Za-z0-9_.-]{1,64}`.
    pub id: String,
    /// Number of individuals, at least 1.
    pub size: u64,
}

/// `population`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct PopulationSpec {
    /// The demes, in deme order.
    pub demes: Vec<DemeSpec>,
}

/// `migration.self_flows`: `"keep"` or a local-retention probability.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SelfFlowsSpec {
    /// Use a flows diagonal as sent.
    Keep,
    /// Replace a flows diagonal by this retention probability.
    Retention(f64),
}

impl Serialize for SelfFlowsSpec {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        match self {
            SelfFlowsSpec::Keep => s.serialize_str("keep"),
            SelfFlowsSpec::Retention(p) => s.serialize_f64(*p),
        }
    }
}

/// `migration`, with the matrix always numeric.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MigrationSpec {
    /// Orientation of `matrix`.
    pub orientation: Orientation,
    /// The `m x m` matrix as sent (from `matrix` or `matrix_csv`), in deme order.
    pub matrix: Vec<Vec<f64>>,
    /// Treatment of a flows diagonal.
    pub self_flows: SelfFlowsSpec,
}

/// `dynamics`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DynamicsSpec {
    /// Update rule.
    pub rule: Rule,
    /// Length of one generation in days, if the caller wants times in days too.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub generation_days: Option<f64>,
}

/// `selection`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SelectionSpec {
    /// The selection coefficients of the sweep, each `> -1`.
    pub s: Vec<f64>,
    /// Where selection acts.
    pub scope: Scope,
}

/// `method`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MethodSpec {
    /// Requested method.
    pub kind: MethodKind,
    /// Job seed (below 2^53, so that every JSON reader keeps it exact).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub seed: Option<u64>,
    /// Most replicates per ensemble.
    pub replicates: u64,
    /// Replicates per chunk.
    pub chunk_size: u64,
    /// Stop an ensemble once its 95% interval is this narrow.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub target_half_width: Option<f64>,
    /// Generations after which a replicate counts as unresolved.
    pub max_generations: u64,
    /// How ensembles of death-birth and birth-death step through time (`auto`, `event`,
    /// `generation`; `ensemble::scheme`). Wright-Fisher always steps by generations.
    pub scheme: Scheme,
    /// Screening approximations to compute, in order of preference (absent: all, in
    /// [`approximations::DEFAULT_ORDER`]).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub approximations: Option<Vec<ApproximationName>>,
}

/// `outputs`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputsSpec {
    /// Report absorption and fixation times.
    pub times: bool,
    /// Frequencies in `(0, 1]` whose first arrival per deme ensembles record.
    pub arrival_fractions: Vec<f64>,
    /// Report the link sensitivities of every result (the exact adjoint for death-birth and
    /// birth-death; an approximation's gradient for approximation and ensemble results).
    pub sensitivity: bool,
}

/// The job exactly as accepted, after defaults were filled in.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct JobSpec {
    /// Free text describing the job.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub label: Option<String>,
    /// Id of a series of related jobs.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub series: Option<String>,
    /// The date (`YYYY-MM-DD`) the job's data describe, within its series.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub as_of: Option<String>,
    /// Demes and sizes.
    pub population: PopulationSpec,
    /// Migration matrix.
    pub migration: MigrationSpec,
    /// Update rule and time unit.
    pub dynamics: DynamicsSpec,
    /// Selection sweep and scope.
    pub selection: SelectionSpec,
    /// Starts: deme ids, `uniform`, `at_birth`.
    pub start: Vec<String>,
    /// Method and its settings.
    pub method: MethodSpec,
    /// What to report.
    pub outputs: OutputsSpec,
    /// What-if scenarios on movement links ([`whatif`]); left out when empty.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub interventions: Vec<whatif::InterventionSpec>,
    /// A greedy plan of link reductions ([`whatif`]); left out when absent.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub plan: Option<whatif::PlanSpec>,
}

/// How the warning of [`ValidatedJob::pick_seed`] begins.
const PICKED_SEED_WARNING: &str = "no method.seed was given:";

/// Whether `warning` is the one [`ValidatedJob::pick_seed`] adds: it belongs to the
/// submission that had no seed, not to a later one that sends the recorded seed.
pub fn is_picked_seed_warning(warning: &str) -> bool {
    warning.starts_with(PICKED_SEED_WARNING)
}

/// Settings that come from the deployment, not from the job.
#[derive(Debug, Clone, Default)]
pub struct Limits {
    /// Limits of the exact method (the state-space limit decides `auto`).
    pub exact: ExactConfig,
}

/// A job that passed every check, ready to compute.
#[derive(Debug, Clone)]
pub struct ValidatedJob {
    spec: JobSpec,
    population: Population,
    model: Model,
    starts: Vec<Start>,
    method: ResolvedMethod,
    exact: ExactConfig,
    states: Option<u64>,
    warnings: Vec<String>,
    whatif: whatif::WhatIfJob,
    notify_url: Option<String>,
}

impl ValidatedJob {
    /// `notify_url` as sent (a valid `http://` URL), if the job has one. Not part of
    /// [`ValidatedJob::spec`].
    pub fn notify_url(&self) -> Option<&str> {
        self.notify_url.as_deref()
    }

    /// The normalised job.
    pub fn spec(&self) -> &JobSpec {
        &self.spec
    }

    /// The what-if scenarios and the plan, in the science crate's terms.
    pub fn whatif(&self) -> &whatif::WhatIfJob {
        &self.whatif
    }

    /// Deme ids in deme order.
    pub fn deme_ids(&self) -> impl ExactSizeIterator<Item = &str> {
        self.spec.population.demes.iter().map(|d| d.id.as_str())
    }

    /// Id of deme `i`.
    pub fn deme_id(&self, i: usize) -> &str {
        &self.spec.population.demes[i].id
    }

    /// The population.
    pub fn population(&self) -> &Population {
        &self.population
    }

    /// The model at the first `s` of the sweep; use [`Model::with_selection`] for the others.
    pub fn model(&self) -> &Model {
        &self.model
    }

    /// The selection sweep.
    pub fn selection(&self) -> &[f64] {
        &self.spec.selection.s
    }

    /// The starts, in the order of `spec.start`.
    pub fn starts(&self) -> &[Start] {
        &self.starts
    }

    /// How a start is written in documents: a deme id, `uniform` or `at_birth`.
    pub fn start_label(&self, start: Start) -> &str {
        match start {
            Start::Deme(i) => self.deme_id(i),
            Start::Uniform => "uniform",
            Start::AtBirth => "at_birth",
        }
    }

    /// The method this job runs.
    pub fn method(&self) -> ResolvedMethod {
        self.method
    }

    /// Limits and solver settings of the exact method.
    pub fn exact_config(&self) -> &ExactConfig {
        &self.exact
    }

    /// Number of count vectors of the exact chain (`None` above 2^64).
    pub fn states(&self) -> Option<u64> {
        self.states
    }

    /// The screening approximations to compute, in order of preference.
    pub fn approximations(&self) -> &[ApproximationName] {
        self.spec
            .method
            .approximations
            .as_deref()
            .unwrap_or(&approximations::DEFAULT_ORDER)
    }

    /// Warnings found while validating (and when a seed was picked).
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }

    /// Whether the job needs a seed it does not have (`ensemble` or `auto` without
    /// `method.seed`).
    pub fn needs_seed(&self) -> bool {
        self.spec.method.seed.is_none()
            && matches!(
                self.spec.method.kind,
                MethodKind::Ensemble | MethodKind::Auto
            )
    }

    /// Records a seed picked by the caller for a job that has none, with a warning. The seed
    /// is reduced below 2^53. Does nothing when the job has a seed or needs none.
    pub fn pick_seed(&mut self, seed: u64) {
        if !self.needs_seed() {
            return;
        }
        let seed = seed % MAX_EXACT_INTEGER;
        self.spec.method.seed = Some(seed);
        self.warnings.push(format!(
            "{PICKED_SEED_WARNING} picked {seed} and recorded it in spec.method.seed; \
             send it again to reproduce this run"
        ));
    }

    /// Ensemble settings, or `None` while the job has no seed.
    pub fn ensemble_config(&self) -> Option<EnsembleConfig> {
        let m = &self.spec.method;
        Some(EnsembleConfig {
            seed: m.seed?,
            replicates: m.replicates,
            chunk_size: m.chunk_size,
            target_half_width: m.target_half_width,
            max_generations: m.max_generations,
            arrival_fractions: self.spec.outputs.arrival_fractions.clone(),
            scheme: m.scheme,
        })
    }
}

/// Where the cells of the sent matrix live in the document, for pointers.
enum Locator {
    /// `migration.matrix`: every entry has its own pointer.
    Json(Pointer),
    /// `migration.matrix_csv`: one pointer; details name the line and field.
    Csv(Pointer, Vec<usize>),
    /// `migration.matrix_ref`: one pointer; details name the row and column of the stored
    /// matrix (counted from 0, as in `migration.matrix`).
    Stored(Pointer),
}

impl Locator {
    fn whole(&self) -> &Pointer {
        match self {
            Locator::Json(p) | Locator::Csv(p, _) | Locator::Stored(p) => p,
        }
    }

    fn row(&self, i: usize) -> (Pointer, String) {
        match self {
            Locator::Json(p) => (p.index(i), String::new()),
            Locator::Csv(p, lines) => (p.clone(), csv_line(lines, i)),
            Locator::Stored(p) => (p.clone(), format!("stored matrix, row {i}")),
        }
    }

    fn entry(&self, i: usize, j: usize) -> (Pointer, String) {
        match self {
            Locator::Json(p) => (p.index(i).index(j), String::new()),
            Locator::Csv(p, lines) => (
                p.clone(),
                format!("{}, field {}", csv_line(lines, i), j + 1),
            ),
            Locator::Stored(p) => (p.clone(), format!("stored matrix, row {i}, column {j}")),
        }
    }
}

fn csv_line(lines: &[usize], i: usize) -> String {
    match lines.get(i) {
        Some(l) => format!("line {l}"),
        None => format!("row {}", i + 1),
    }
}

/// The matrix as parsed: entries that are not numbers are `None` (already reported).
struct SentMatrix {
    rows: Vec<Vec<Option<f64>>>,
    at: Locator,
}

/// `migration` as parsed.
struct MigrationParts {
    orientation: Option<Orientation>,
    matrix: Option<SentMatrix>,
    self_flows: Option<SelfFlowsSpec>,
    self_flows_at: Pointer,
}

/// A deme entry as parsed; fields that failed are `None`. `raw_id` is any string given.
struct DemeParts {
    raw_id: Option<String>,
    id: Option<String>,
    size: Option<u64>,
}

/// Whether `id` matches `[A-Za-z0-9_.-]{1,64}`.
pub fn is_valid_id(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'_' | b'.' | b'-'))
}

/// Start keywords, which therefore cannot be deme ids.
const START_KEYWORDS: &[&str] = &["uniform", "at_birth"];

/// Parses raw request bytes as JSON text; invalid JSON is one problem at the root pointer.
pub fn parse_json(bytes: &[u8]) -> Result<Value, Vec<Problem>> {
    serde_json::from_slice::<Value>(bytes).map_err(|e| {
        vec![Problem::new(
            &Pointer::root(),
            format!("the request body is not valid JSON: {e}"),
        )]
    })
}

/// Parses raw request bytes (JSON text) and validates them, without a matrix store.
pub fn parse_bytes(bytes: &[u8], limits: &Limits) -> Result<ValidatedJob, Vec<Problem>> {
    validate(&parse_json(bytes)?, limits)
}

/// Validates a job document without a matrix store (a `matrix_ref` is reported as
/// unresolvable here), returning every problem found when it is not acceptable.
pub fn validate(doc: &Value, limits: &Limits) -> Result<ValidatedJob, Vec<Problem>> {
    validate_with(doc, limits, &NoStoredMatrices)
}

/// Validates a job document, resolving `migration.matrix_ref` through `refs`: a stored
/// matrix then goes through exactly the checks of an inline one, and becomes the spec's
/// `migration.matrix`.
pub fn validate_with(
    doc: &Value,
    limits: &Limits,
    refs: &dyn MatrixRefs,
) -> Result<ValidatedJob, Vec<Problem>> {
    let mut w = Walker::default();
    let root = Pointer::root();
    let Some(top) = w.object(doc, &root, TOP_FIELDS) else {
        return Err(w.into_problems());
    };

    let label = top
        .get("label")
        .and_then(|v| label(&mut w, v, &root.key("label")));
    let notify_url = top
        .get("notify_url")
        .and_then(|v| notify_url(&mut w, v, &root.key("notify_url")));
    let series = top.get("series").and_then(|v| {
        let at = root.key("series");
        let s = w.string(v, &at)?;
        if is_valid_id(s) {
            Some(s.to_owned())
        } else {
            w.report(&at, "must match [A-Za-z0-9_.-]{1,64}");
            None
        }
    });
    let as_of = top.get("as_of").and_then(|v| {
        let at = root.key("as_of");
        let s = w.string(v, &at)?;
        if top.get("series").is_none() {
            w.report(&at, "needs `series`: a date places a job within its series");
        }
        match chrono::NaiveDate::parse_from_str(s, "%Y-%m-%d") {
            Ok(d) if d.format("%Y-%m-%d").to_string() == s => Some(s.to_owned()),
            _ => {
                w.report(&at, "must be a calendar date YYYY-MM-DD");
                None
            }
        }
    });

    let demes = w
        .required(top, &root, "population")
        .and_then(|v| population(&mut w, v, &root.key("population")));
    let rule_and_days = w
        .required(top, &root, "dynamics")
        .map(|v| dynamics(&mut w, v, &root.key("dynamics")));
    let rule = rule_and_days.as_ref().and_then(|d| d.0);
    let raw_ids: Option<Vec<String>> = demes.as_ref().map(|d| {
        d.iter()
            .map(|p| p.raw_id.clone().unwrap_or_default())
            .collect()
    });
    let migration = w
        .required(top, &root, "migration")
        .and_then(|v| migration_parts(&mut w, v, &root.key("migration"), raw_ids.as_deref(), refs));
    let selection = w
        .required(top, &root, "selection")
        .and_then(|v| selection(&mut w, v, &root.key("selection")));
    let ids: Vec<Option<&str>> = demes
        .as_ref()
        .map(|d| d.iter().map(|p| p.raw_id.as_deref()).collect())
        .unwrap_or_default();
    let starts = starts(
        &mut w,
        top.get("start"),
        &root.key("start"),
        demes.is_some(),
        &ids,
    );
    let method = method(&mut w, top.get("method"), &root.key("method"));
    let outputs = outputs(&mut w, top.get("outputs"), &root.key("outputs"));
    let sweep = selection.as_ref().map(|(s, ..)| s.as_slice());
    let (interventions, plan) = whatif::parse(&mut w, top, &ids, demes.is_some(), sweep);

    // Checks across members, on what could be read.
    if let (Some(rule), Some((_, Some(scope), scope_at)), Some(demes)) =
        (rule, selection.as_ref(), demes.as_ref())
    {
        let all_single = demes.iter().all(|d| d.size == Some(1));
        if *scope == Scope::Deme && rule != Rule::BirthDeath && all_single {
            w.report(
                scope_at,
                format!(
                    "with every deme of size 1, `deme` scope exerts no selection under {}: \
                     use `neighbourhood` (death-birth or Wright-Fisher on a graph)",
                    rule.as_str()
                ),
            );
        }
    }
    let matrix = migration
        .as_ref()
        .and_then(|parts| check_matrix(&mut w, parts, demes.as_deref(), rule));

    if w.has_problems() {
        return Err(w.into_problems());
    }
    // Every member parsed, or a problem would have been reported.
    let (
        Some(demes),
        Some((Some(rule), generation_days)),
        Some(MigrationParts {
            orientation: Some(orientation),
            self_flows: Some(self_flows),
            ..
        }),
        Some((s, Some(scope), _)),
        Some((resolved, sent_rows)),
        Some(starts),
        Some(method),
        Some(outputs),
    ) = (
        demes,
        rule_and_days,
        migration,
        selection,
        matrix,
        starts,
        method,
        outputs,
    )
    else {
        debug_assert!(false, "a member failed to parse without a problem");
        return Err(vec![Problem::new(
            &root,
            "the job could not be read (internal inconsistency; please report it)",
        )]);
    };
    let mut deme_specs = Vec::with_capacity(demes.len());
    for d in demes {
        let (Some(id), Some(size)) = (d.id, d.size) else {
            debug_assert!(false, "a deme failed to parse without a problem");
            return Err(vec![Problem::new(&root, "the demes could not be read")]);
        };
        deme_specs.push(DemeSpec { id, size });
    }
    let spec = JobSpec {
        label,
        series,
        as_of,
        population: PopulationSpec { demes: deme_specs },
        migration: MigrationSpec {
            orientation,
            matrix: sent_rows,
            self_flows,
        },
        dynamics: DynamicsSpec {
            rule,
            generation_days,
        },
        selection: SelectionSpec { s, scope },
        start: starts.iter().map(|(label, _)| label.clone()).collect(),
        method,
        outputs,
        interventions,
        plan,
    };
    let starts: Vec<Start> = starts.into_iter().map(|(_, s)| s).collect();
    let mut job = finish(spec, starts, resolved, limits)?;
    job.notify_url = notify_url;
    Ok(job)
}

/// The checks that need the whole job: population totals, reachability, state-space size.
fn finish(
    spec: JobSpec,
    starts: Vec<Start>,
    resolved: Resolved,
    limits: &Limits,
) -> Result<ValidatedJob, Vec<Problem>> {
    let mut w = Walker::default();
    let root = Pointer::root();
    let demes_at = root.key("population").key("demes");
    let sizes: Vec<u64> = spec.population.demes.iter().map(|d| d.size).collect();
    let ids: Vec<&str> = spec
        .population
        .demes
        .iter()
        .map(|d| d.id.as_str())
        .collect();
    let total = sizes.iter().try_fold(0u64, |a, &n| a.checked_add(n));
    match total {
        Some(t) if t < 2 => {
            w.report(&demes_at, "the population needs at least 2 individuals");
            return Err(w.into_problems());
        }
        Some(t) if t <= MAX_EXACT_INTEGER => {}
        _ => {
            w.report(
                &demes_at,
                format!("the total population size must be at most 2^53 = {MAX_EXACT_INTEGER}"),
            );
            return Err(w.into_problems());
        }
    }
    let population = Population::new(sizes).expect("sizes were checked");
    let rule = spec.dynamics.rule;
    let model = Model::new(
        &population,
        resolved.matrix.clone(),
        rule,
        spec.selection.scope,
        spec.selection.s[0],
    )
    .expect("the kernel matches the population and s was checked");

    let mut warnings = Vec::new();
    let name_list = |list: &[usize]| -> String {
        list.iter()
            .map(|&i| format!("`{}`", ids[i]))
            .collect::<Vec<_>>()
            .join(", ")
    };
    if !resolved.rescaled_rows.is_empty() {
        warnings.push(format!(
            "migration rows of {} did not sum to 1 and were divided by their sums \
             (read as weights, not probabilities)",
            name_list(&resolved.rescaled_rows)
        ));
    }
    if !resolved.closed_rows.is_empty() {
        warnings.push(format!(
            "demes {} have no flows to other demes: under the stated self_flows retention \
             they keep all their offspring",
            name_list(&resolved.closed_rows)
        ));
    }
    let unreachable = reach::unreachable_from_each(&model);
    if unreachable.iter().all(|u| !u.is_empty()) {
        warnings.push(
            "the migration graph splits the population: no deme's lineage can reach every \
             deme, so the variant can never fix from any start (every fixation probability \
             is exactly 0; it can only settle in part of the population)"
                .to_owned(),
        );
    }
    let mut groups: BTreeMap<&[usize], Vec<usize>> = BTreeMap::new();
    for (j, u) in unreachable.iter().enumerate() {
        if !u.is_empty() {
            groups.entry(u.as_slice()).or_default().push(j);
        }
    }
    for (never, from) in groups {
        warnings.push(format!(
            "fixation is impossible from {} (the migration graph is not strongly connected): \
             a lineage starting there never reaches {}",
            name_list(&from),
            name_list(never)
        ));
    }
    if let Some(mixed) = stays_mixed(&model) {
        let (a, b) = mixed.sources;
        w.report(
            &root.key("migration"),
            format!(
                "`{deme}` receives lineages from two source groups that never receive any from \
                 outside (one holds `{a}`, the other `{b}`): a variant can take over one group \
                 while the other stays resident, so `{deme}` keeps receiving both types, the \
                 chain is never absorbed and neither fixation everywhere nor an absorption time \
                 exists. Add flows between the groups, or analyse them as separate populations",
                deme = ids[mixed.deme],
                a = ids[a],
                b = ids[b],
            ),
        );
    }
    if rule == Rule::BirthDeath && spec.selection.scope == Scope::Neighbourhood {
        warnings.push(
            "selection.scope does not apply to birth_death (the parent is chosen by fitness \
             over the whole population); it was ignored"
                .to_owned(),
        );
    }

    let states = population.state_count();
    let kind_at = root.key("method").key("kind");
    let method = match spec.method.kind {
        MethodKind::Exact => match exact::check_size(&model, &limits.exact) {
            Ok(states) => ResolvedMethod::Exact { states },
            Err(e) => {
                w.report(&kind_at, too_large(&e));
                return Err(w.into_problems());
            }
        },
        MethodKind::Auto => match exact::check_size(&model, &limits.exact) {
            Ok(states) => ResolvedMethod::Exact { states },
            Err(_) => ResolvedMethod::Ensemble,
        },
        MethodKind::Ensemble => ResolvedMethod::Ensemble,
        MethodKind::Approximation => ResolvedMethod::Approximation,
    };
    // Approximation and ensemble sensitivities depend on the computed regimes: compute.rs
    // warns about those.
    if spec.outputs.sensitivity
        && matches!(method, ResolvedMethod::Exact { .. })
        && rule == Rule::WrightFisher
    {
        warnings.push(
            "outputs.sensitivity of the exact method is computed for death_birth and \
             birth_death only so far; none are reported for wright_fisher"
                .to_owned(),
        );
    }
    let no_approximations = spec
        .method
        .approximations
        .as_ref()
        .is_some_and(Vec::is_empty);
    if spec.outputs.sensitivity && method == ResolvedMethod::Ensemble && no_approximations {
        warnings.push(
            "outputs.sensitivity: ensemble link rows come from the screening approximations, \
             and method.approximations is empty; none are reported"
                .to_owned(),
        );
    }
    if !spec.outputs.arrival_fractions.is_empty() && method != ResolvedMethod::Ensemble {
        warnings.push(
            "arrival times come from ensembles only; this job's method does not report them"
                .to_owned(),
        );
    }
    // What-if scenarios and the plan are checked against the model (spec/whatif.rs).
    let whatif = whatif::check(&mut w, &spec, &model, method);
    if w.has_problems() {
        return Err(w.into_problems());
    }
    Ok(ValidatedJob {
        spec,
        population,
        model,
        starts,
        method,
        exact: limits.exact.clone(),
        states,
        warnings,
        whatif,
        notify_url: None,
    })
}

/// `notify_url`: an `http://` URL with a host (the service has no TLS client).
fn notify_url(w: &mut Walker, v: &Value, at: &Pointer) -> Option<String> {
    let text = w.string(v, at)?;
    match crate::http_client::HttpUrl::parse(text) {
        Ok(_) => Some(text.to_owned()),
        Err(e) => {
            w.report(at, format!("`{text}`: {e}", text = shorten(text)));
            None
        }
    }
}

/// At most 100 characters of `text`, for messages.
fn shorten(text: &str) -> String {
    if text.chars().count() <= 100 {
        text.to_owned()
    } else {
        format!("{}...", text.chars().take(100).collect::<String>())
    }
}

fn too_large(e: &ExactError) -> String {
    match e {
        ExactError::TooManyStates { states, limit } => {
            let states = match states {
                Some(n) => n.to_string(),
                None => "more than 2^64".to_owned(),
            };
            format!(
                "the exact chain would have {states} count vectors, above the limit of \
                 {limit}: use `ensemble`, or `auto` to choose by size"
            )
        }
        other => format!("the exact method cannot run this job: {other}"),
    }
}

fn label(w: &mut Walker, v: &Value, at: &Pointer) -> Option<String> {
    let s = w.string(v, at)?;
    if s.chars().count() > MAX_LABEL_CHARS {
        w.report(at, format!("must be at most {MAX_LABEL_CHARS} characters"));
        return None;
    }
    Some(s.to_owned())
}

fn population(w: &mut Walker, v: &Value, at: &Pointer) -> Option<Vec<DemeParts>> {
    let map = w.object(v, at, &["demes"])?;
    let demes_at = at.key("demes");
    let list = w.required(map, at, "demes")?;
    let list = w.array(list, &demes_at)?;
    if list.is_empty() {
        w.report(&demes_at, "needs at least one deme");
    }
    if list.len() > MAX_DEMES {
        w.report(
            &demes_at,
            format!("at most {MAX_DEMES} demes are supported"),
        );
        return None;
    }
    let mut seen: BTreeMap<&str, usize> = BTreeMap::new();
    let mut out = Vec::with_capacity(list.len());
    for (i, d) in list.iter().enumerate() {
        let d_at = demes_at.index(i);
        let mut part = DemeParts {
            raw_id: None,
            id: None,
            size: None,
        };
        if let Some(map) = w.object(d, &d_at, &["id", "size"]) {
            if let Some(id) = w.required(map, &d_at, "id") {
                let id_at = d_at.key("id");
                if let Some(id) = w.string(id, &id_at) {
                    part.raw_id = Some(id.to_owned());
                    if !is_valid_id(id) {
                        w.report(&id_at, "must match [A-Za-z0-9_.-]{1,64}");
                    } else if START_KEYWORDS.contains(&id) {
                        w.report(&id_at, format!("`{id}` is reserved as a start keyword"));
                    } else if let Some(first) = seen.get(id) {
                        w.report(
                            &id_at,
                            format!("duplicate id `{id}` (also at /population/demes/{first})"),
                        );
                    } else {
                        seen.insert(id, i);
                        part.id = Some(id.to_owned());
                    }
                }
            }
            if let Some(size) = w.required(map, &d_at, "size") {
                part.size = w.whole(size, &d_at.key("size"), 1, MAX_EXACT_INTEGER);
            }
        }
        out.push(part);
    }
    Some(out)
}

fn dynamics(w: &mut Walker, v: &Value, at: &Pointer) -> (Option<Rule>, Option<f64>) {
    let Some(map) = w.object(v, at, &["rule", "generation_days"]) else {
        return (None, None);
    };
    let rule = w.required(map, at, "rule").and_then(|r| {
        match w.choice(
            r,
            &at.key("rule"),
            &["death_birth", "birth_death", "wright_fisher"],
        )? {
            "death_birth" => Some(Rule::DeathBirth),
            "birth_death" => Some(Rule::BirthDeath),
            _ => Some(Rule::WrightFisher),
        }
    });
    let days = map.get("generation_days").and_then(|d| {
        let d_at = at.key("generation_days");
        let x = w.number(d, &d_at)?;
        if x > 0.0 {
            Some(x)
        } else {
            w.report(&d_at, "must be a positive number of days");
            None
        }
    });
    (rule, days)
}

fn migration_parts(
    w: &mut Walker,
    v: &Value,
    at: &Pointer,
    ids: Option<&[String]>,
    refs: &dyn MatrixRefs,
) -> Option<MigrationParts> {
    let map = w.object(
        v,
        at,
        &[
            "orientation",
            "matrix",
            "matrix_csv",
            "matrix_ref",
            "self_flows",
        ],
    )?;
    let orientation = w.required(map, at, "orientation").and_then(|o| {
        match w.choice(
            o,
            &at.key("orientation"),
            &["recruitment", "dispersal", "flows"],
        )? {
            "recruitment" => Some(Orientation::Recruitment),
            "dispersal" => Some(Orientation::Dispersal),
            _ => Some(Orientation::Flows),
        }
    });
    let self_flows_at = at.key("self_flows");
    let self_flows = match map.get("self_flows") {
        None => Some(SelfFlowsSpec::Keep),
        Some(Value::String(s)) if s == "keep" => Some(SelfFlowsSpec::Keep),
        Some(Value::Number(n)) => {
            let p = n.as_f64().unwrap_or(f64::NAN);
            if !(0.0..=1.0).contains(&p) {
                w.report(
                    &self_flows_at,
                    "a local-retention probability must lie in [0, 1]",
                );
                None
            } else if orientation.is_some_and(|o| o != Orientation::Flows) {
                w.report(
                    &self_flows_at,
                    "a local-retention probability applies only to orientation `flows`",
                );
                None
            } else {
                Some(SelfFlowsSpec::Retention(p))
            }
        }
        Some(other) => {
            w.report(
                &self_flows_at,
                format!(
                    "must be \"keep\" or a local-retention probability in [0, 1], not {}",
                    match other {
                        Value::String(s) => format!("`{s}`"),
                        v => type_name(v).to_owned(),
                    }
                ),
            );
            None
        }
    };
    let sources: Vec<&str> = ["matrix", "matrix_csv", "matrix_ref"]
        .into_iter()
        .filter(|k| map.contains_key(*k))
        .collect();
    let matrix = match sources.as_slice() {
        [] => {
            w.report(at, "one of matrix, matrix_csv or matrix_ref is required");
            None
        }
        [_, second, ..] => {
            w.report(
                &at.key(second),
                format!("give only one of {}", sources.join(", ")),
            );
            None
        }
        ["matrix"] => json_matrix(w, &map["matrix"], &at.key("matrix")),
        ["matrix_csv"] => {
            let csv_at = at.key("matrix_csv");
            let text = w.string(&map["matrix_csv"], &csv_at)?;
            let (parsed, details) = csv::parse(text, ids);
            for d in details {
                w.report(&csv_at, d);
            }
            Some(SentMatrix {
                rows: parsed.rows,
                at: Locator::Csv(csv_at, parsed.lines),
            })
        }
        _ => stored_matrix(w, &map["matrix_ref"], &at.key("matrix_ref"), refs),
    };
    Some(MigrationParts {
        orientation,
        matrix,
        self_flows,
        self_flows_at,
    })
}

/// `migration.matrix_ref`: the stored matrix it names, through `refs`.
fn stored_matrix(
    w: &mut Walker,
    v: &Value,
    ref_at: &Pointer,
    refs: &dyn MatrixRefs,
) -> Option<SentMatrix> {
    let r = w.string(v, ref_at)?;
    let Some(sha256) = sha256_of_ref(r) else {
        w.report(
            ref_at,
            "must be `sha256:` followed by 64 lowercase hex digits",
        );
        return None;
    };
    match refs.lookup(sha256) {
        RefLookup::Found(rows) => Some(SentMatrix {
            rows: rows
                .iter()
                .map(|r| r.iter().copied().map(Some).collect())
                .collect(),
            at: Locator::Stored(ref_at.clone()),
        }),
        RefLookup::Unknown => {
            w.report(
                ref_at,
                format!(
                    "no stored matrix has the hash {sha256}: POST the matrix to \
                             /v1/matrices first, or send `matrix` or `matrix_csv`"
                ),
            );
            None
        }
        RefLookup::Unavailable => {
            w.report(
                ref_at,
                "matrix_ref names a matrix stored by the service, which resolves it; \
                         the command line cannot: send `matrix` or `matrix_csv`",
            );
            None
        }
    }
}

fn json_matrix(w: &mut Walker, v: &Value, at: &Pointer) -> Option<SentMatrix> {
    let rows = w.array(v, at)?;
    if rows.len() > MAX_DEMES {
        w.report(at, format!("at most {MAX_DEMES} rows are supported"));
        return None;
    }
    let mut out = Vec::with_capacity(rows.len());
    for (i, row) in rows.iter().enumerate() {
        let row_at = at.index(i);
        let Some(cells) = w.array(row, &row_at) else {
            out.push(Vec::new());
            continue;
        };
        if cells.len() > MAX_DEMES {
            w.report(
                &row_at,
                format!("at most {MAX_DEMES} entries are supported"),
            );
            out.push(Vec::new());
            continue;
        }
        out.push(
            cells
                .iter()
                .enumerate()
                .map(|(j, c)| w.number(c, &row_at.index(j)))
                .collect(),
        );
    }
    Some(SentMatrix {
        rows: out,
        at: Locator::Json(at.clone()),
    })
}

/// Shape, entry and structure checks of the matrix, through `migration::resolve`. Returns
/// the resolved matrix and the matrix as sent (with `-0.0` as `0.0`); problems are reported.
fn check_matrix(
    w: &mut Walker,
    parts: &MigrationParts,
    demes: Option<&[DemeParts]>,
    rule: Option<Rule>,
) -> Option<(Resolved, Vec<Vec<f64>>)> {
    let matrix = parts.matrix.as_ref()?;
    let orientation = parts.orientation?;
    let m = demes.map_or(matrix.rows.len(), <[_]>::len);
    // Sizes only scale the conversions between orientations; an unreadable size reads as 1.
    let sizes: Vec<u64> = match demes {
        Some(d) => d.iter().map(|p| p.size.unwrap_or(1)).collect(),
        None => vec![1; m],
    };
    let names: Vec<String> = (0..m)
        .map(|i| match demes.and_then(|d| d[i].raw_id.as_deref()) {
            Some(id) => format!("deme `{id}`"),
            None => format!("deme {i}"),
        })
        .collect();
    // Cells that are not numbers were reported already; they read as 1 below, and so do
    // non-finite and negative cells on the second pass, so that they never make a row or a
    // column look empty.
    let placeholder = |clean_bad: bool| -> Vec<Vec<f64>> {
        matrix
            .rows
            .iter()
            .map(|r| {
                r.iter()
                    .map(|c| match c {
                        Some(x) if !clean_bad || (x.is_finite() && *x >= 0.0) => *x,
                        _ => 1.0,
                    })
                    .collect()
            })
            .collect()
    };
    let self_flows = match parts.self_flows {
        Some(SelfFlowsSpec::Retention(p)) => SelfFlows::Retention(p),
        _ => SelfFlows::Keep,
    };
    // Without a rule, only the checks that do not depend on it apply.
    let needed = rule.map_or(Needed::Recruitment, Rule::needs);
    let mut input = MigrationInput {
        orientation,
        rows: placeholder(false),
        self_flows,
    };
    let issues = match migration::resolve(&input, &sizes, needed) {
        Ok(resolved) => {
            let sent = normalise_zeros(input.rows);
            return rule.map(|_| (resolved, sent));
        }
        Err(issues) => issues,
    };
    let shape_ok = !issues.iter().any(|i| {
        matches!(
            i,
            MatrixIssue::RowCount { .. } | MatrixIssue::RowLength { .. }
        )
    });
    let entries_only = issues.iter().all(|i| {
        matches!(
            i,
            MatrixIssue::NotFinite { .. } | MatrixIssue::Negative { .. }
        )
    });
    let mut all = issues;
    // A stored matrix is square: a wrong size is one problem, not one per row as well.
    if matches!(matrix.at, Locator::Stored(_))
        && all
            .iter()
            .any(|i| matches!(i, MatrixIssue::RowCount { .. }))
    {
        all.retain(|i| !matches!(i, MatrixIssue::RowLength { .. }));
    }
    if shape_ok && entries_only {
        input.rows = placeholder(true);
        if let Err(more) = migration::resolve(&input, &sizes, needed) {
            all.extend(more.into_iter().filter(|i| {
                matches!(
                    i,
                    MatrixIssue::ZeroRow { .. } | MatrixIssue::ZeroColumn { .. }
                )
            }));
        }
    }
    for issue in all {
        let structural = matches!(
            issue,
            MatrixIssue::ZeroRow { .. } | MatrixIssue::ZeroColumn { .. }
        );
        if rule.is_none() && structural {
            continue;
        }
        report_issue(w, &issue, matrix, &parts.self_flows_at, orientation, &names);
    }
    None
}

fn normalise_zeros(rows: Vec<Vec<f64>>) -> Vec<Vec<f64>> {
    rows.into_iter()
        .map(|r| {
            r.into_iter()
                .map(|x| if x == 0.0 { 0.0 } else { x })
                .collect()
        })
        .collect()
}

fn report_issue(
    w: &mut Walker,
    issue: &MatrixIssue,
    matrix: &SentMatrix,
    self_flows_at: &Pointer,
    orientation: Orientation,
    names: &[String],
) {
    let with = |prefix: String, detail: &str| -> String {
        if prefix.is_empty() {
            detail.to_owned()
        } else {
            format!("{prefix}: {detail}")
        }
    };
    let name = |i: usize| names.get(i).cloned().unwrap_or_else(|| format!("deme {i}"));
    match *issue {
        MatrixIssue::RowCount { rows, expected } => w.report(
            matrix.at.whole(),
            format!(
                "the matrix has {rows} rows but there are {expected} demes: it must be \
                 {expected} x {expected}"
            ),
        ),
        MatrixIssue::RowLength { row, len, expected } => {
            let (at, prefix) = matrix.at.row(row);
            let detail = format!("the row has {len} entries but there are {expected} demes");
            w.report(&at, with(prefix, &detail))
        }
        MatrixIssue::NotFinite { row, col } => {
            let (at, prefix) = matrix.at.entry(row, col);
            let detail = "must be a finite number (NaN and infinities are not)";
            w.report(&at, with(prefix, detail))
        }
        MatrixIssue::Negative { row, col } => {
            let (at, prefix) = matrix.at.entry(row, col);
            w.report(&at, with(prefix, "must not be negative"))
        }
        MatrixIssue::ZeroRow { row } => {
            let (at, prefix) = matrix.at.row(row);
            let who = name(row);
            let detail = match orientation {
                Orientation::Recruitment => {
                    format!("the row of {who} is all zeros: its vacancies would have no source")
                }
                Orientation::Dispersal => format!(
                    "the row of {who} is all zeros: its offspring would have nowhere to settle"
                ),
                Orientation::Flows => format!(
                    "the row of {who} is all zeros: nothing moves out of it, so birth_death \
                     has nowhere to place its offspring"
                ),
            };
            w.report(&at, with(prefix, &detail))
        }
        MatrixIssue::ZeroColumn { col } => {
            let who = name(col);
            let detail = match orientation {
                Orientation::Flows => format!(
                    "column {col} ({who}) is all zeros: nothing ever moves into {who}, so its \
                     vacancies would have no source"
                ),
                Orientation::Dispersal => format!(
                    "column {col} ({who}) is all zeros: no offspring ever settles in {who}, \
                     so its vacancies would have no source"
                ),
                Orientation::Recruitment => format!(
                    "column {col} ({who}) is all zeros: {who} never fills a vacancy anywhere, \
                     so where its offspring settle is undefined"
                ),
            };
            w.report(matrix.at.whole(), detail)
        }
        MatrixIssue::Retention => w.report(
            self_flows_at,
            "a local-retention probability must lie in [0, 1]",
        ),
    }
}

fn selection(
    w: &mut Walker,
    v: &Value,
    at: &Pointer,
) -> Option<(Vec<f64>, Option<Scope>, Pointer)> {
    let map = w.object(v, at, &["s", "scope"])?;
    let s_at = at.key("s");
    let s = w.required(map, at, "s").and_then(|s| {
        let checked = |w: &mut Walker, v: &Value, at: &Pointer| -> Option<f64> {
            let x = w.number(v, at)?;
            if x > -1.0 {
                Some(x)
            } else {
                w.report(
                    at,
                    format!("s = {x}: must be greater than -1 (fitness 1 + s > 0)"),
                );
                None
            }
        };
        match s {
            Value::Array(list) => {
                if list.is_empty() {
                    w.report(&s_at, "needs at least one value");
                    return None;
                }
                if list.len() > MAX_SWEEP {
                    w.report(&s_at, format!("at most {MAX_SWEEP} values"));
                    return None;
                }
                let before = w.count();
                let mut out: Vec<f64> = Vec::with_capacity(list.len());
                for (k, x) in list.iter().enumerate() {
                    let x_at = s_at.index(k);
                    if let Some(x) = checked(w, x, &x_at) {
                        let x = if x == 0.0 { 0.0 } else { x };
                        if let Some(first) = out.iter().position(|y| *y == x) {
                            w.report(
                                &x_at,
                                format!("s = {x} is listed twice (also at /selection/s/{first})"),
                            );
                        }
                        out.push(x);
                    }
                }
                (w.count() == before).then_some(out)
            }
            other => checked(w, other, &s_at).map(|x| vec![if x == 0.0 { 0.0 } else { x }]),
        }
    });
    let scope_at = at.key("scope");
    let scope = match map.get("scope") {
        None => Some(Scope::Deme),
        Some(v) => match w.choice(v, &scope_at, &["deme", "neighbourhood"]) {
            Some("deme") => Some(Scope::Deme),
            Some(_) => Some(Scope::Neighbourhood),
            None => None,
        },
    };
    s.map(|s| (s, scope, scope_at))
}

/// `start`: returns each start's label and meaning, or `None` after reporting a problem.
fn starts(
    w: &mut Walker,
    v: Option<&Value>,
    at: &Pointer,
    demes_known: bool,
    ids: &[Option<&str>],
) -> Option<Vec<(String, Start)>> {
    let Some(v) = v else {
        return Some(vec![("uniform".to_owned(), Start::Uniform)]);
    };
    let list = w.array(v, at)?;
    if list.is_empty() {
        w.report(
            at,
            "needs at least one start: a deme id, \"uniform\" or \"at_birth\"",
        );
        return None;
    }
    let before = w.count();
    let mut out: Vec<(String, Start)> = Vec::with_capacity(list.len());
    for (k, s) in list.iter().enumerate() {
        let s_at = at.index(k);
        let Some(name) = w.string(s, &s_at) else {
            continue;
        };
        let start = match name {
            "uniform" => Some(Start::Uniform),
            "at_birth" => Some(Start::AtBirth),
            id => match ids.iter().position(|d| *d == Some(id)) {
                Some(i) => Some(Start::Deme(i)),
                None if demes_known => {
                    w.report(
                        &s_at,
                        format!(
                            "`{id}` is not a deme id of population.demes, nor \"uniform\" or \
                             \"at_birth\""
                        ),
                    );
                    None
                }
                None => None,
            },
        };
        if let Some(first) = out.iter().position(|(n, _)| n == name) {
            w.report(
                &s_at,
                format!("`{name}` is listed twice (also at /start/{first})"),
            );
        }
        if let Some(start) = start {
            out.push((name.to_owned(), start));
        }
    }
    (w.count() == before && demes_known).then_some(out)
}

fn method(w: &mut Walker, v: Option<&Value>, at: &Pointer) -> Option<MethodSpec> {
    let mut spec = MethodSpec {
        kind: MethodKind::Auto,
        seed: None,
        replicates: DEFAULT_REPLICATES,
        chunk_size: DEFAULT_CHUNK_SIZE,
        target_half_width: None,
        max_generations: DEFAULT_MAX_GENERATIONS,
        scheme: Scheme::Auto,
        approximations: None,
    };
    let Some(v) = v else {
        return Some(spec);
    };
    let map = w.object(
        v,
        at,
        &[
            "kind",
            "seed",
            "replicates",
            "chunk_size",
            "target_half_width",
            "max_generations",
            "scheme",
            "approximations",
        ],
    )?;
    let before = w.count();
    if let Some(k) = map.get("kind") {
        spec.kind = match w.choice(
            k,
            &at.key("kind"),
            &["exact", "ensemble", "approximation", "auto"],
        ) {
            Some("exact") => MethodKind::Exact,
            Some("ensemble") => MethodKind::Ensemble,
            Some("approximation") => MethodKind::Approximation,
            _ => MethodKind::Auto,
        };
    }
    if let Some(s) = map.get("seed") {
        spec.seed = w.whole(s, &at.key("seed"), 0, MAX_EXACT_INTEGER - 1);
    }
    if let Some(k) = map.get("scheme") {
        spec.scheme = match w.choice(k, &at.key("scheme"), &["auto", "event", "generation"]) {
            Some("event") => Scheme::Event,
            Some("generation") => Scheme::Generation,
            _ => Scheme::Auto,
        };
    }
    let whole = |w: &mut Walker, key: &str, max: u64, default: u64| -> u64 {
        map.get(key)
            .and_then(|v| w.whole(v, &at.key(key), 1, max))
            .unwrap_or(default)
    };
    spec.replicates = whole(w, "replicates", MAX_REPLICATES, DEFAULT_REPLICATES);
    spec.chunk_size = whole(w, "chunk_size", MAX_REPLICATES, DEFAULT_CHUNK_SIZE);
    spec.max_generations = whole(
        w,
        "max_generations",
        MAX_EXACT_INTEGER,
        DEFAULT_MAX_GENERATIONS,
    );
    if let Some(t) = map.get("target_half_width") {
        let t_at = at.key("target_half_width");
        if let Some(x) = w.number(t, &t_at) {
            if x > 0.0 && x <= 0.5 {
                spec.target_half_width = Some(x);
            } else {
                w.report(&t_at, "must lie in (0, 0.5]");
            }
        }
    }
    if let Some(list) = map.get("approximations") {
        let list_at = at.key("approximations");
        spec.approximations = approximations::parse(w, list, &list_at);
        if spec.kind == MethodKind::Approximation
            && spec.approximations.as_ref().is_some_and(Vec::is_empty)
        {
            w.report(
                &list_at,
                "method `approximation` needs at least one approximation to compute",
            );
        }
    }
    (w.count() == before).then_some(spec)
}

fn outputs(w: &mut Walker, v: Option<&Value>, at: &Pointer) -> Option<OutputsSpec> {
    let mut spec = OutputsSpec {
        times: true,
        arrival_fractions: Vec::new(),
        sensitivity: false,
    };
    let Some(v) = v else {
        return Some(spec);
    };
    let map: &Map<String, Value> =
        w.object(v, at, &["times", "arrival_fractions", "sensitivity"])?;
    let before = w.count();
    if let Some(t) = map.get("times") {
        spec.times = w.boolean(t, &at.key("times")).unwrap_or(true);
    }
    if let Some(t) = map.get("sensitivity") {
        spec.sensitivity = w.boolean(t, &at.key("sensitivity")).unwrap_or(false);
    }
    if let Some(list) = map.get("arrival_fractions") {
        let list_at = at.key("arrival_fractions");
        if let Some(list) = w.array(list, &list_at) {
            for (k, f) in list.iter().enumerate() {
                let f_at = list_at.index(k);
                let Some(x) = w.number(f, &f_at) else {
                    continue;
                };
                if !(x > 0.0 && x <= 1.0) {
                    w.report(&f_at, format!("{x} is not a fraction in (0, 1]"));
                } else if let Some(first) = spec.arrival_fractions.iter().position(|y| *y == x) {
                    w.report(
                        &f_at,
                        format!("{x} is listed twice (also at index {first})"),
                    );
                } else {
                    spec.arrival_fractions.push(x);
                }
            }
        }
    }
    (w.count() == before).then_some(spec)
}

#[cfg(test)]
mod tests;
