//! One subject's planning from start to end: where the new regimen starts, ranking the
//! candidates over the posterior draws, and the next-level advice for the recommendation.
//! Shared by `cistern plan` and `cistern report`.

use super::Course;
use super::advisor::{Advice, Question, advise};
use super::candidates::amount_step;
use super::recommend::{Plan, PlanInput, plan};
use super::targets::{Limits, Metric, Target};
use crate::choice::choice_enum;
use crate::dosing::{Dose, Regimen};
use crate::engine::Params;
use crate::engine::steady::SteadyCurve;
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
    /// Seed of the advisor's simulations.
    pub seed: u64,
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
}

/// One interval after the last dose (the interval between the last two doses, else 24 h).
pub(crate) fn default_start(doses: &[Dose]) -> f64 {
    match doses {
        [] => 0.0,
        [only] => only.time_h + 24.0,
        [.., a, b] => b.time_h + (b.time_h - a.time_h).max(f64::EPSILON),
    }
}

/// Candidate sampling times: every twelfth of an interval over the first intervals of the new
/// regimen, plus the end of each infusion; a time on a dose is read a minute before it.
pub fn sampling_times(c: &Regimen, start: f64, intervals: u32) -> Vec<f64> {
    let mut t: Vec<f64> = (1..=12 * intervals).map(|i| start + c.every_h * f64::from(i) / 12.0).collect();
    if c.duration_h > 0.0 {
        t.extend((0..intervals).map(|j| start + f64::from(j) * c.every_h + c.duration_h));
    }
    for x in t.iter_mut() {
        let phase = (*x - start) / c.every_h;
        if (phase - phase.round()).abs() < 1e-12 {
            *x -= 1.0 / 60.0;
        }
    }
    t.sort_by(f64::total_cmp);
    t.dedup_by(|a, b| (*a - *b).abs() < 1e-9);
    t
}

/// Plan for one subject with dose history `history`.
pub fn plan_subject(history: &[Dose], posterior: &Posterior, s: &Settings) -> Result<Outcome, InputError> {
    let Some(first_target) = s.targets.first() else {
        return Err(InputError::field("targets", "planning needs at least one target"));
    };
    let start_h = s.start_h.unwrap_or_else(|| default_start(history));
    let mut notes = Vec::new();
    if s.start_h.is_none() {
        notes.push(format!("the new regimen starts at {start_h} h (one interval after the last dose)"));
    }
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
            let exposure: Vec<f64> = posterior
                .draws
                .iter()
                .map(|p| {
                    SteadyCurve::new(p, c).map_or(f64::NAN, |curve| {
                        let m = curve.exposure();
                        match metric {
                            Exposure::Auc24 => m.auc24_mg_h_l,
                            Exposure::Trough => m.trough_mg_l,
                            Exposure::Peak => m.peak_mg_l,
                            Exposure::Cavg => m.cavg_mg_l,
                        }
                    })
                })
                .collect();
            let times = sampling_times(&c, start_h, intervals);
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
    Ok(Outcome { start_h, plan, advice, notes })
}
