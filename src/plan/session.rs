//! One subject's planning from start to end: where the new regimen starts, ranking the
//! candidates over the posterior draws, and the next-level advice for the recommendation.
//! Shared by `cistern plan` and `cistern report`.

use super::Course;
use super::advisor::{Advice, Question, advise};
use super::candidates::amount_step;
use super::recommend::{Plan, PlanInput, plan};
use super::targets::{Limits, Metric, Target};
use crate::choice::choice_enum;
use crate::dosing::{Dose, Regimen, Route};
use crate::engine::Params;
use crate::engine::steady::{self, SteadyCurve};
use crate::error::InputError;
use crate::model::Residual;

choice_enum! {
    /// An exposure the next-level advice can pin down.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum Exposure: "exposure" {
        /// Steady-state AUC over 24 h.
        Auc24 = "auc24",
        /// Steady-state trough.
        Trough = "trough",
        /// Steady-state peak.
        Peak = "peak",
        /// Steady-state average concentration.
        Cavg = "cavg",
    }
}

impl Exposure {
    /// Its `<quantity>_<unit>` name.
    pub fn name(self) -> &'static str {
        match self {
            Exposure::Auc24 => "auc24_mg_h_l",
            Exposure::Trough => "trough_mg_l",
            Exposure::Peak => "peak_mg_l",
            Exposure::Cavg => "cavg_mg_l",
        }
    }

    /// The exposure a target is about (AUC24 for targets that are not one of the four).
    pub fn of(target: &Target) -> Exposure {
        match target.metric {
            Metric::Trough => Exposure::Trough,
            Metric::Peak => Exposure::Peak,
            Metric::Cavg => Exposure::Cavg,
            _ => Exposure::Auc24,
        }
    }
}

/// A subject's posterior.
#[derive(Debug, Clone)]
pub struct Posterior {
    /// The point estimate.
    pub point: Params,
    /// Equal-weight posterior draws.
    pub draws: Vec<Params>,
    /// The residual error model, needed for the advice.
    pub residual: Option<Residual>,
}

/// What to plan.
#[derive(Debug, Clone)]
pub struct Settings<'a> {
    /// Candidate regimens.
    pub candidates: &'a [Regimen],
    /// Targets.
    pub targets: &'a [Target],
    /// Limits.
    pub limits: Limits,
    /// When the new regimen starts; by default one interval after the last dose.
    pub start_h: Option<f64>,
    /// The exposure the advice should pin down; by default that of the first target.
    pub advise_on: Option<Exposure>,
    /// Intervals of the new regimen searched for the next sampling time; 0 for no advice.
    pub advise_intervals: u32,
    /// The earliest a level may be drawn after the end of an intravenous dose (h): the
    /// distribution phase is left out ([`DEFAULT_SAMPLE_AFTER_H`] by default).
    pub sample_after_h: f64,
    /// Seed of the advisor's simulations.
    pub seed: u64,
}

/// The earliest a level may be drawn after the end of an infusion or a bolus, 1 h: common
/// practice (no source), so that a level reflects the elimination phase the one-compartment
/// model describes, not the distribution that follows the dose.
pub const DEFAULT_SAMPLE_AFTER_H: f64 = 1.0;

/// What is on record for the subject: the doses given and when the last level was drawn.
#[derive(Debug, Clone, Copy)]
pub struct Record<'a> {
    /// The doses given so far.
    pub history: &'a [Dose],
    /// Time of the last level drawn (h), if any.
    pub last_level_h: Option<f64>,
}

/// The outcome.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// When the new regimen starts (h).
    pub start_h: f64,
    /// Ranked candidates and the recommendation.
    pub plan: Plan,
    /// Next-level advice, when asked for and possible.
    pub advice: Option<Advice>,
    /// Notes for the user.
    pub notes: Vec<String>,
    /// Warnings for the user (a stated start before recorded data).
    pub warnings: Vec<String>,
}

/// Where the new regimen starts by default: one interval after the last dose (the interval
/// between the last two doses, else 24 h), but never before the last level, so that every
/// recorded observation lies within the history the plan continues; with the reason, for the
/// note.
pub(crate) fn default_start(record: &Record) -> (f64, String) {
    let after_dose = match record.history {
        [] => None,
        [only] => Some(only.time_h + 24.0),
        [.., a, b] => Some(b.time_h + (b.time_h - a.time_h).max(f64::EPSILON)),
    };
    match (after_dose, record.last_level_h) {
        (Some(t), Some(l)) if l > t => {
            (l, format!("the last level; one interval after the last dose, {t} h, is before it"))
        }
        (Some(t), _) => (t, "one interval after the last dose".into()),
        (None, Some(l)) => (l, "at the last level".into()),
        (None, None) => (0.0, "no doses are on record".into()),
    }
}

/// A warning when a stated start lies before recorded data: the plan's curves and day-N AUCs
/// then assume the new regimen was already running when those doses or levels were recorded.
fn start_before_record(start_h: f64, record: &Record) -> Option<String> {
    let later: Vec<f64> = record.history.iter().map(|d| d.time_h).filter(|&t| t > start_h).collect();
    let last_dose = later.iter().copied().reduce(f64::max);
    let (last_h, last) = [last_dose.map(|t| (t, "dose")), record.last_level_h.map(|t| (t, "level"))]
        .into_iter()
        .flatten()
        .filter(|(t, _)| *t > start_h)
        .max_by(|a, b| a.0.total_cmp(&b.0))?;
    let doses = match later.len() {
        0 => String::new(),
        1 => " (1 recorded dose comes after it)".into(),
        n => format!(" ({n} recorded doses come after it)"),
    };
    Some(format!(
        "the new regimen starts at {start_h} h, before the last recorded event, the {last} at {last_h} h{doses}: \
         the plan continues the history from {start_h} h as if what was recorded after it had not been"
    ))
}

/// The earliest phase after each dose of `c` at which the advisor may propose a level (h): the
/// end of an intravenous dose plus `sample_after_h`; after an oral dose, the expected
/// (steady-state) peak of the point estimate when the exposure is a trough, else any time.
pub fn earliest_sample_phase(c: &Regimen, point: &Params, metric: Exposure, sample_after_h: f64) -> f64 {
    match c.route {
        Route::Oral if metric == Exposure::Trough => {
            SteadyCurve::new(point, *c).map_or(0.0, |curve| curve.exposure().peak_time_h)
        }
        Route::Oral => 0.0,
        _ => c.duration_h + sample_after_h,
    }
}

/// Candidate sampling times: every twelfth of an interval over the first intervals of the new
/// regimen at or after `earliest` hours into each interval, plus that earliest time itself;
/// a time on a dose is read a minute before it (a trough, always allowed).
pub fn sampling_times(c: &Regimen, start: f64, intervals: u32, earliest: f64) -> Vec<f64> {
    let tau = c.every_h;
    let mut t: Vec<f64> = (1..=12 * intervals).map(|i| start + tau * f64::from(i) / 12.0).collect();
    if earliest < tau {
        t.extend((0..intervals).map(|j| start + f64::from(j) * tau + earliest));
    }
    t.retain(|x| {
        let phase = (*x - start) / tau;
        let on_dose = (phase - phase.round()).abs() < 1e-12;
        on_dose || (phase - phase.floor()) * tau >= earliest - 1e-9
    });
    for x in t.iter_mut() {
        let phase = (*x - start) / tau;
        if (phase - phase.round()).abs() < 1e-12 {
            *x -= 1.0 / 60.0;
        }
    }
    t.sort_by(f64::total_cmp);
    t.dedup_by(|a, b| (*a - *b).abs() < 1e-9);
    t
}

/// Plan for one subject with what is on `record`.
pub fn plan_subject(record: &Record, posterior: &Posterior, s: &Settings) -> Result<Outcome, InputError> {
    let Some(first_target) = s.targets.first() else {
        return Err(InputError::field("targets", "planning needs at least one target"));
    };
    let history = record.history;
    let mut notes = Vec::new();
    let mut warnings = Vec::new();
    let start_h = match s.start_h {
        Some(t) => {
            warnings.extend(start_before_record(t, record));
            t
        }
        None => {
            let (t, why) = default_start(record);
            notes.push(format!("the new regimen starts at {t} h ({why})"));
            t
        }
    };
    let course = Course { history, start_h, therapy_start_h: history.first().map_or(start_h, |d| d.time_h) };
    let input = PlanInput {
        draws: &posterior.draws,
        point: posterior.point,
        course,
        candidates: s.candidates,
        targets: s.targets,
        limits: s.limits,
        amount_step_mg: amount_step(s.candidates),
    };
    let plan = plan(&input)?;
    let advice = match (&plan.recommended, posterior.residual, s.advise_intervals) {
        (Some(_), _, 0) | (None, _, _) => None,
        (Some(_), None, _) => {
            notes.push("no residual error model: no next-level advice".into());
            None
        }
        (Some(r), Some(residual), intervals) => {
            let c = r.assessment.regimen;
            let metric = s.advise_on.unwrap_or_else(|| Exposure::of(first_target));
            let earliest = earliest_sample_phase(&c, &posterior.point, metric, s.sample_after_h);
            let exposure: Vec<f64> = posterior
                .draws
                .iter()
                .map(|p| {
                    steady::exposure(p, &c).map_or(f64::NAN, |m| match metric {
                        Exposure::Auc24 => m.auc24_mg_h_l,
                        Exposure::Trough => m.trough_mg_l,
                        Exposure::Peak => m.peak_mg_l,
                        Exposure::Cavg => m.cavg_mg_l,
                    })
                })
                .collect();
            let times = sampling_times(&c, start_h, intervals, earliest);
            let until = start_h + c.every_h * f64::from(intervals + 1);
            let doses = course.continued(&c, r.loading_dose_mg, until);
            Some(advise(&Question {
                draws: &posterior.draws,
                exposure: &exposure,
                exposure_name: metric.name(),
                doses: &doses,
                times: &times,
                residual,
                simulations: 200,
                seed: s.seed,
            }))
        }
    };
    Ok(Outcome { start_h, plan, advice, notes, warnings })
}
