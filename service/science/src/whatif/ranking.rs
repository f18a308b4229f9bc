//! Ranking links by a gradient, and paired ensemble estimates of the links ranked highest.
//!
//! The gradient of a start-weighted fixation probability with respect to the kernel comes
//! from, in this order of preference: the exact adjoint ([`crate::exact::sensitivity`]) when
//! the caller allows it and the chain fits its limits (death-birth and birth-death); the
//! multi-type branching approximation ([`crate::approx::branching`], `s > 0` only, since its
//! establishment probability is 0 otherwise); the strong-migration limit
//! ([`crate::approx::strong_migration`]). A gradient is used only to order links for a
//! shortlist, never as an answer, so an approximation outside its regime may still rank.
//!
//! [`paired_link_effects`]: for an ensemble job, the links ranked highest by an approximation
//! gradient get a paired finite difference: the model with half of the link's probability
//! moved to its row's retention ([`SECANT_SHARE`]) against the model as given, from the same
//! streams, divided by the probability moved. It is a secant, not a derivative: it includes
//! the curvature over half the link.

use super::intervention::{KernelEdit, Link};
use super::WhatIfError;
use crate::approx::{branching, strong_migration};
use crate::ensemble::paired::{self, PairedError};
use crate::ensemble::{EnsembleConfig, EnsembleJob};
use crate::exact::{self, ExactConfig};
use crate::model::{Model, Rule};
use crate::sensitivity::{rank_by_effect, KernelPartials, LinkEffect};
use crate::start::Start;
use std::sync::atomic::AtomicBool;

/// Share of a link's probability moved to retention by the paired finite difference.
pub const SECANT_SHARE: f64 = 0.5;

/// Which gradient ranked the links.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GradientSource {
    /// The exact adjoint of the Markov chain.
    ExactAdjoint,
    /// The multi-type branching approximation.
    Branching,
    /// The strong-migration approximation.
    StrongMigration,
}

impl GradientSource {
    /// Name for documents: `exact_adjoint`, `approximation:branching`,
    /// `approximation:strong_migration`.
    pub fn as_str(self) -> &'static str {
        match self {
            GradientSource::ExactAdjoint => "exact_adjoint",
            GradientSource::Branching => "approximation:branching",
            GradientSource::StrongMigration => "approximation:strong_migration",
        }
    }
}

/// Link effects of one gradient ([`LinkEffect::derivative`]: per unit of probability moved
/// from retention into the link), in kernel order.
#[derive(Debug, Clone, PartialEq)]
pub struct Ranking {
    /// Where the gradient came from.
    pub source: GradientSource,
    /// One effect per off-diagonal kernel entry that is not zero.
    pub links: Vec<LinkEffect>,
}

/// Where an exact gradient may come from: the limits and the pool to solve on.
#[derive(Clone, Copy)]
pub struct ExactGradient<'a> {
    /// Limits of the exact chain.
    pub config: &'a ExactConfig,
    /// Pool of the solve.
    pub pool: &'a rayon::ThreadPool,
}

/// The link effects of `f = sum_k weights[k] rho_k` at `model`, from the first gradient of
/// the module docs' order that can be computed.
pub fn rank_links(
    model: &Model,
    weights: &[f64],
    exact: Option<ExactGradient<'_>>,
) -> Result<Ranking, WhatIfError> {
    let mut reasons = Vec::new();
    let found = |source, partials: KernelPartials| Ranking {
        source,
        links: partials.link_effects(model.rule()),
    };
    if let Some(ex) = exact {
        if model.rule() != Rule::WrightFisher && exact::check_size(model, ex.config).is_ok() {
            match ex
                .pool
                .install(|| exact::sensitivity(model, ex.config, weights))
            {
                Ok(s) => {
                    return Ok(found(
                        GradientSource::ExactAdjoint,
                        s.d_fixation_probability,
                    ))
                }
                Err(e) => reasons.push(format!("exact adjoint: {e}")),
            }
        }
    }
    if model.fitness() > 1.0 {
        match branching::establishment(model).and_then(|b| b.gradient(model, weights)) {
            Ok(p) => return Ok(found(GradientSource::Branching, p)),
            Err(e) => reasons.push(format!("branching: {e}")),
        }
    }
    match strong_migration::fixation(model).and_then(|a| a.gradient(model, weights)) {
        Ok(p) => Ok(found(GradientSource::StrongMigration, p)),
        Err(e) => {
            reasons.push(format!("strong migration: {e}"));
            Err(WhatIfError::NoGradient(reasons.join("; ")))
        }
    }
}

/// The paired finite difference of one link (module docs), per unit of probability moved
/// from the link to retention.
#[derive(Debug, Clone, PartialEq)]
pub struct PairedLinkEffect {
    /// The link.
    pub link: Link,
    /// Kernel position of the link.
    pub position: (usize, usize),
    /// Probability moved to retention.
    pub delta: f64,
    /// `(rho(moved) - rho) / delta`.
    pub d_fixation_probability: f64,
    /// Its 95% interval (the paired interval of the change, divided by `delta`).
    pub ci95: (f64, f64),
    /// `(T(moved) - T) / delta` for the mean conditional fixation time, generations.
    pub d_mean_fixation_generations: Option<f64>,
    /// The first-order prediction of the ranking gradient, same units.
    pub predicted: f64,
    /// The gradient that ranked the link.
    pub ranked_by: GradientSource,
}

/// For a single start: the `top` links ranked highest (by the size of their effect) by an
/// approximation gradient, each with its paired finite difference from `config.replicates`
/// pairs on the job's streams.
pub fn paired_link_effects(
    model: &Model,
    start: Start,
    config: &EnsembleConfig,
    top: usize,
    pool: &rayon::ThreadPool,
    cancel: &AtomicBool,
) -> Result<Vec<PairedLinkEffect>, WhatIfError> {
    let ranking = rank_links(model, &start.deme_weights(model), None)?;
    let chosen: Vec<LinkEffect> = rank_by_effect(ranking.links)
        .into_iter()
        .take(top)
        .collect();
    if chosen.is_empty() {
        return Ok(Vec::new());
    }
    let base_job = EnsembleJob::new(model, start, config)?;
    let baseline = paired::outcomes(&base_job, pool, cancel).ok_or(WhatIfError::Cancelled)?;
    let mut out = Vec::with_capacity(chosen.len());
    for effect in chosen {
        let (row, col) = (effect.row, effect.col);
        let mut edit = KernelEdit::new(model.kernel());
        let delta = edit.get(row, col) * SECANT_SHARE;
        edit.cut(row, col, delta);
        let moved = model
            .with_kernel(edit.finish())
            .expect("the kernel keeps its dimension");
        let (_, job) = paired::paired_jobs(model, &moved, start, config)?;
        let scenario = paired::outcomes(&job, pool, cancel).ok_or(WhatIfError::Cancelled)?;
        let p = paired::compare(
            &baseline,
            &scenario,
            job.ticks_per_generation(),
            model.demes(),
            config.arrival_fractions.len(),
        );
        out.push(PairedLinkEffect {
            link: Link::at(model.rule(), row, col),
            position: (row, col),
            delta,
            d_fixation_probability: p.change_fixation_probability / delta,
            ci95: (p.ci95.0 / delta, p.ci95.1 / delta),
            d_mean_fixation_generations: p.fixation_time.map(|t| t.change / delta),
            predicted: -effect.derivative,
            ranked_by: ranking.source,
        });
    }
    Ok(out)
}

impl From<PairedError> for WhatIfError {
    fn from(e: PairedError) -> Self {
        match e {
            PairedError::Ensemble(e) => WhatIfError::Ensemble(e),
            PairedError::Cancelled => WhatIfError::Cancelled,
            PairedError::Unpaired => WhatIfError::Unpaired,
        }
    }
}
