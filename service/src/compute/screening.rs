//! The screening approximations of a job (`method.approximations`): what each result says
//! about them, which one answers `method.kind = approximation`, their link rows, and the
//! warnings they need.
//!
//! * Computed once per `s` (the weak-selection coefficients once per job: they are an
//!   expansion about `s = 0`), in the job's order, each with its `ValidRegime` at that `s`.
//! * Primary rule of `method.kind = approximation`: per `s`, the first approximation in the
//!   job's order (`method.approximations`, default `spec::approximations::DEFAULT_ORDER`)
//!   whose regime is inside; when none is, the first one that could be computed, with a
//!   warning; when none could be computed, the well-mixed reference, with a warning.
//! * Every result gets the `approximations` array; beside an exact or ensemble answer each
//!   entry carries its discrepancy from it.
//! * Whenever an approximation outside its regime is shown (as the answer or in the array),
//!   a warning names it and the values of `s`.
//! * Link rows (`outputs.sensitivity`) of an approximation answer come from the primary's
//!   gradient; those of an ensemble answer from the first approximation inside its regime
//!   (none, with a warning, when no approximation is inside).
//! * The strong-migration regime carries `first_order_error` (its estimated relative error
//!   from the exact first-order coefficients) whenever the weak-selection coefficients can
//!   be computed for the job, listed or not.
//! * The weak-selection pair system is refused above [`UNLISTED_WEAK_MAX_UNKNOWNS`] unless
//!   the job lists `weak_selection`; then the weak module's own limit applies.

use super::{link_rows, model_at, not_cancelled, ComputeError, Outcome};
use crate::document::{ApproximationEntry, LinkSensitivity, RunResult, WeakCoefficients};
use crate::spec::{ApproximationName, ResolvedMethod, ValidatedJob};
use demefix_science::approx::{branching, strong_migration, ValidRegime};
use demefix_science::sensitivity::KernelPartials;
use demefix_science::weak::{self, WeakConfig, WeakError, WeakSelection};
use demefix_science::{well_mixed, Model, Start};
use std::sync::atomic::AtomicBool;

/// Largest weak-selection pair system (`m (m + 1) / 2` unknowns: 200 demes) computed when the
/// job does not list `weak_selection` in `method.approximations`. Beyond it the coefficients
/// take seconds to minutes (README, weak-selection timings at 2,000 demes), which a job that
/// did not ask for them should not pay.
pub const UNLISTED_WEAK_MAX_UNKNOWNS: usize = 20_100;

/// Most values of `s` a warning lists before it only counts the rest.
const LISTED_S: usize = 8;

/// The science answer behind one approximation.
enum Answer {
    Branching(branching::Branching),
    StrongMigration(strong_migration::StrongMigration),
    WeakSelection(WeakSelection),
}

/// One approximation computed at one `s`.
struct Screened {
    name: ApproximationName,
    regime: ValidRegime,
    answer: Answer,
}

impl Screened {
    /// The start-weighted answer at `s`; a weak-selection value outside `[0, 1]` is written
    /// as the nearest bound (its regime is then outside).
    fn value(&self, weights: &[f64], s: f64) -> f64 {
        match &self.answer {
            Answer::Branching(b) => b.combine(weights),
            Answer::StrongMigration(a) => a.combine(weights),
            Answer::WeakSelection(w) => {
                let (neutral, slope) = w.combine(weights);
                (neutral + s * slope).clamp(0.0, 1.0)
            }
        }
    }

    fn entry(&self, weights: &[f64], s: f64) -> ApproximationEntry {
        let coefficients = match &self.answer {
            Answer::WeakSelection(w) => {
                let (neutral, slope) = w.combine(weights);
                Some(WeakCoefficients { neutral, slope })
            }
            _ => None,
        };
        ApproximationEntry::new(
            self.name.as_str(),
            self.value(weights, s),
            coefficients,
            self.regime.clone(),
        )
    }

    /// Kernel partials of the start-weighted answer (of the unclamped linear value for weak
    /// selection).
    fn partials(
        &self,
        model: &Model,
        weights: &[f64],
        weak_config: &WeakConfig,
    ) -> Result<KernelPartials, String> {
        match &self.answer {
            Answer::Branching(b) => b.gradient(model, weights).map_err(|e| e.to_string()),
            Answer::StrongMigration(a) => a.gradient(model, weights).map_err(|e| e.to_string()),
            Answer::WeakSelection(_) => weak::gradient(model, weights, weak_config)
                .map(|g| g.partials(model.fitness() - 1.0))
                .map_err(|e| e.to_string()),
        }
    }
}

/// What the warnings of a job's approximations are about; each is kept with the values of
/// `s` it applies to, in the order first met.
#[derive(Debug, Clone, PartialEq)]
enum Note {
    /// Shown beside a result (not as its answer) outside its regime.
    Outside(ApproximationName),
    /// The answer of `method.kind = approximation`, no approximation being inside.
    PrimaryOutside(ApproximationName),
    /// Could not be computed.
    Failed(ApproximationName, String),
    /// No approximation could be computed: the well-mixed reference answers.
    WellMixedFallback,
    /// Ensemble results without link rows: no approximation inside its regime.
    NoRowsOutsideRegime,
    /// Approximation results without link rows: none could be computed.
    NoRowsWithoutApproximation,
    /// The gradient failed.
    RowsFailed(ApproximationName, String),
}

fn s_list(values: &[f64]) -> String {
    let shown: Vec<String> = values
        .iter()
        .take(LISTED_S)
        .map(|s| s.to_string())
        .collect();
    let mut text = format!("s = {}", shown.join(", "));
    if values.len() > LISTED_S {
        text.push_str(&format!(" and {} more", values.len() - LISTED_S));
    }
    text
}

impl Note {
    fn text(&self, values: &[f64]) -> String {
        let at = s_list(values);
        match self {
            Note::Outside(name) => format!(
                "approximation `{}` is outside its valid regime for {at}: shown in \
                 `approximations` for comparison only (see its valid_regime.reasons)",
                name.as_str()
            ),
            Note::PrimaryOutside(name) => format!(
                "no screening approximation is inside its valid regime for {at}: those \
                 results are `{}`, the first that could be computed in the job's order; treat \
                 them as rough (see valid_regime.reasons)",
                name.method()
            ),
            Note::Failed(name, why) => format!(
                "approximation `{}` could not be computed for {at}: {why}",
                name.as_str()
            ),
            Note::WellMixedFallback => format!(
                "no screening approximation could be computed for {at}: those results are the \
                 well-mixed reference, which ignores the population structure"
            ),
            Note::NoRowsOutsideRegime => format!(
                "outputs.sensitivity: ensemble link rows come from an approximation inside its \
                 valid regime, and none is for {at}; those results have no link rows"
            ),
            Note::NoRowsWithoutApproximation => format!(
                "outputs.sensitivity: no screening approximation could be computed for {at}; \
                 those results have no link rows"
            ),
            Note::RowsFailed(name, why) => format!(
                "outputs.sensitivity: the gradient of `{}` failed for {at} ({why}); those \
                 results have no link rows",
                name.as_str()
            ),
        }
    }
}

/// The approximations of one job, computed `s` by `s`, and what to warn about.
struct Screening<'a> {
    job: &'a ValidatedJob,
    pool: &'a rayon::ThreadPool,
    weak_config: WeakConfig,
    /// The weak-selection coefficients, once computed (they do not depend on `s`).
    weak: Option<Result<WeakSelection, String>>,
    notes: Vec<(Note, Vec<f64>)>,
}

impl<'a> Screening<'a> {
    fn new(job: &'a ValidatedJob, pool: &'a rayon::ThreadPool) -> Self {
        let listed = job
            .spec()
            .method
            .approximations
            .as_ref()
            .is_some_and(|l| l.contains(&ApproximationName::WeakSelection));
        let max_unknowns = if listed {
            weak::MAX_UNKNOWNS
        } else {
            UNLISTED_WEAK_MAX_UNKNOWNS
        };
        Self {
            job,
            pool,
            weak_config: WeakConfig {
                max_unknowns,
                ..WeakConfig::default()
            },
            weak: None,
            notes: Vec::new(),
        }
    }

    fn note(&mut self, note: Note, s: f64) {
        match self.notes.iter_mut().find(|(n, _)| *n == note) {
            Some((_, values)) => {
                if values.last() != Some(&s) {
                    values.push(s);
                }
            }
            None => self.notes.push((note, vec![s])),
        }
    }

    fn weak_coefficients(&mut self) -> Result<WeakSelection, String> {
        if self.weak.is_none() {
            let (config, model) = (&self.weak_config, self.job.model());
            let found = self.pool.install(|| weak::first_order_with(model, config));
            self.weak = Some(found.map(|w| w.coefficients).map_err(|e| match e {
                WeakError::TooLarge { unknowns, limit } if limit == UNLISTED_WEAK_MAX_UNKNOWNS => {
                    format!(
                        "its pair system has {unknowns} unknowns, above the {limit} computed \
                         when method.approximations does not list it (list `weak_selection` \
                         there to compute it; it can take minutes)"
                    )
                }
                other => other.to_string(),
            }));
        }
        self.weak.clone().expect("computed above")
    }

    /// Every approximation the job lists that can be computed at `model`'s `s`, in the job's
    /// order; the others are noted.
    fn at(&mut self, model: &Model, s: f64) -> Vec<Screened> {
        let mut out = Vec::new();
        for &name in self.job.approximations() {
            let found = match name {
                ApproximationName::Branching => self
                    .pool
                    .install(|| branching::establishment(model))
                    .map(|b| (b.regime.clone(), Answer::Branching(b)))
                    .map_err(|e| e.to_string()),
                ApproximationName::StrongMigration => {
                    match self.pool.install(|| strong_migration::fixation(model)) {
                        Ok(mut a) => {
                            // the first-order check needs the exact first-order
                            // coefficients; without them the indicator is absent
                            if let Ok(w) = self.weak_coefficients() {
                                a.check_first_order(&w)
                                    .expect("coefficients of the job's own demes");
                            }
                            Ok((a.regime.clone(), Answer::StrongMigration(a)))
                        }
                        Err(e) => Err(e.to_string()),
                    }
                }
                ApproximationName::WeakSelection => self
                    .weak_coefficients()
                    .map(|w| (weak::regime(model, &w), Answer::WeakSelection(w))),
            };
            match found {
                Ok((regime, answer)) => out.push(Screened {
                    name,
                    regime,
                    answer,
                }),
                Err(why) => self.note(Note::Failed(name, why), s),
            }
        }
        out
    }

    /// Notes every shown approximation outside its regime, except `primary`.
    fn note_shown(&mut self, computed: &[Screened], primary: Option<ApproximationName>, s: f64) {
        for c in computed {
            if !c.regime.inside && Some(c.name) != primary {
                self.note(Note::Outside(c.name), s);
            }
        }
    }

    /// The link rows of `chosen` for one start (none, noted, when its gradient fails).
    fn rows(
        &mut self,
        s: f64,
        start: Start,
        model: &Model,
        chosen: &Screened,
    ) -> Vec<LinkSensitivity> {
        let weights = start.deme_weights(model);
        let config = self.weak_config;
        match self
            .pool
            .install(|| chosen.partials(model, &weights, &config))
        {
            Ok(partials) => link_rows(
                self.job,
                s,
                start,
                model,
                &partials,
                None,
                chosen.name.method(),
            ),
            Err(why) => {
                self.note(Note::RowsFailed(chosen.name, why), s);
                Vec::new()
            }
        }
    }

    fn into_warnings(self) -> Vec<String> {
        self.notes
            .iter()
            .map(|(note, values)| note.text(values))
            .collect()
    }
}

fn entries(computed: &[Screened], weights: &[f64], s: f64) -> Vec<ApproximationEntry> {
    computed.iter().map(|c| c.entry(weights, s)).collect()
}

/// The answer of `method.kind = approximation`: per `(s, start)`, the primary approximation
/// (module docs) with every computed one beside it.
pub(super) fn run_approximations(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
) -> Result<Outcome, ComputeError> {
    let rule = job.spec().dynamics.rule;
    let total = job.population().total();
    let want_rows = job.spec().outputs.sensitivity;
    let mut screening = Screening::new(job, pool);
    let mut results = Vec::new();
    let mut sensitivity = Vec::new();
    for &s in job.selection() {
        not_cancelled(cancel)?;
        let model = model_at(job, s)?;
        let wm = well_mixed::reference(rule, total, s);
        let computed = screening.at(&model, s);
        let primary = computed
            .iter()
            .find(|c| c.regime.inside)
            .or(computed.first());
        match primary {
            None => screening.note(Note::WellMixedFallback, s),
            Some(p) if !p.regime.inside => screening.note(Note::PrimaryOutside(p.name), s),
            Some(_) => {}
        }
        screening.note_shown(&computed, primary.map(|p| p.name), s);
        for &start in job.starts() {
            let weights = start.deme_weights(&model);
            let label = job.start_label(start);
            let mut result = match primary {
                Some(p) => RunResult::screening(
                    s,
                    label,
                    p.name.method(),
                    p.value(&weights, s),
                    p.regime.clone(),
                    &wm,
                ),
                None => RunResult::approximation(s, label, &wm),
            };
            result.approximations = Some(entries(&computed, &weights, s));
            results.push(result);
            if want_rows {
                match primary {
                    Some(p) => sensitivity.extend(screening.rows(s, start, &model, p)),
                    None => screening.note(Note::NoRowsWithoutApproximation, s),
                }
            }
        }
    }
    let method = match results.first() {
        Some(first) if results.iter().all(|r| r.method == first.method) => first.method.clone(),
        _ => "approximation".to_owned(),
    };
    Ok(Outcome {
        results,
        sensitivity,
        warnings: screening.into_warnings(),
        method,
        whatif: Default::default(),
    })
}

/// Adds the `approximations` array (with discrepancies) to every exact or ensemble result of
/// `outcome`, the link rows of ensemble results when the job asks for them, and the
/// warnings. `outcome.results` must be in job order (`s` outermost, then the starts).
pub(super) fn attach(
    job: &ValidatedJob,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
    outcome: &mut Outcome,
) -> Result<(), ComputeError> {
    if job.approximations().is_empty() || job.method() == ResolvedMethod::Approximation {
        return Ok(());
    }
    let per_s = job.starts().len();
    debug_assert_eq!(outcome.results.len(), job.selection().len() * per_s);
    let want_rows = job.spec().outputs.sensitivity;
    let mut screening = Screening::new(job, pool);
    for (k, &s) in job.selection().iter().enumerate() {
        not_cancelled(cancel)?;
        let model = model_at(job, s)?;
        let computed = screening.at(&model, s);
        screening.note_shown(&computed, None, s);
        let best_inside = computed.iter().find(|c| c.regime.inside);
        for (j, &start) in job.starts().iter().enumerate() {
            let Some(result) = outcome.results.get_mut(k * per_s + j) else {
                continue;
            };
            let weights = start.deme_weights(&model);
            let mut shown = entries(&computed, &weights, s);
            shown.iter_mut().for_each(|e| e.compare_with(result));
            result.approximations = Some(shown);
            // Hook for ensemble sensitivities of their own (paired simulation): until then an
            // ensemble's link rows come from the best approximation inside its regime.
            if want_rows && result.method.starts_with("ensemble") {
                match best_inside {
                    Some(best) => {
                        let rows = screening.rows(s, start, &model, best);
                        outcome.sensitivity.extend(rows);
                    }
                    None => screening.note(Note::NoRowsOutsideRegime, s),
                }
            }
        }
    }
    outcome.warnings.extend(screening.into_warnings());
    Ok(())
}
