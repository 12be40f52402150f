//! Regimen planning: targets and limits, candidate regimens, the exposure of a candidate for
//! one set of individual parameters, and (in [`recommend`]) probabilities over posterior draws.
//!
//! Steady-state metrics come in closed form ([`steady::exposure`]; the periodic
//! [`SteadyCurve`] only for time above a threshold); AUC over a stated day of
//! therapy continues the real dose history with the candidate regimen from its start time.

pub mod advisor;
pub mod candidates;
pub mod recommend;
pub mod session;

pub mod targets;

use crate::dosing::{Dose, Regimen};
use crate::engine::steady::{self, Exposure, SteadyCurve};
use crate::engine::{self, Params};
use crate::error::InputError;
use targets::{Limits, Metric, Target};

/// What a plan's draws are, for every text that names them: the subject's posterior when levels
/// were fitted, the population prior for the subject's covariates when planned a priori.
pub fn draws_name(a_priori: bool) -> &'static str {
    if a_priori { "draws from the population prior" } else { "posterior draws" }
}

/// Where a candidate regimen starts: after the doses already given.
#[derive(Debug, Clone, Copy)]
pub struct Course<'a> {
    /// Doses already given (sorted by time).
    pub history: &'a [Dose],
    /// Time of the candidate's first dose (h).
    pub start_h: f64,
    /// Start of therapy, from which "day N" is counted (h).
    pub therapy_start_h: f64,
}

impl<'a> Course<'a> {
    /// A fresh start at time 0 with no history (virtual subjects).
    pub fn fresh() -> Course<'static> {
        Course { history: &[], start_h: 0.0, therapy_start_h: 0.0 }
    }

    /// The history continued by `candidate` (with an optional loading dose first) up to `until_h`.
    pub fn continued(&self, candidate: &Regimen, loading_mg: Option<f64>, until_h: f64) -> Vec<Dose> {
        let mut doses = self.history.to_vec();
        let mut t = self.start_h;
        let mut first = true;
        // The spec bounds the doses a target day asks for (limits::MAX_DOSES); the loop keeps
        // that bound itself, so no input can make it run on.
        let most = doses.len() + crate::limits::MAX_DOSES as usize;
        while t < until_h && doses.len() < most {
            let amount = if first { loading_mg.unwrap_or(candidate.amount_mg) } else { candidate.amount_mg };
            doses.push(Dose { amount_mg: amount, ..candidate.dose_at(t) });
            first = false;
            t += candidate.every_h;
        }
        doses
    }
}

/// The end of the last "day N" any target asks about, from the start of therapy (h).
pub(crate) fn last_day_end(targets: &[Target], course: &Course) -> Option<f64> {
    targets
        .iter()
        .filter_map(|t| match t.metric {
            Metric::AucDay { day } => Some(course.therapy_start_h + 24.0 * f64::from(day)),
            _ => None,
        })
        .reduce(f64::max)
}

/// One candidate's exposure for one set of parameters.
#[derive(Debug, Clone)]
pub struct Evaluation {
    /// Steady-state metrics.
    pub steady: Exposure,
    /// The value of each target's metric, in target order.
    pub values: Vec<f64>,
    /// Every target met.
    pub meets: bool,
    /// Steady-state peak above the limit.
    pub over_peak: bool,
    /// Steady-state trough above the limit.
    pub over_trough: bool,
}

/// Evaluate `candidate` for `params`. `course_doses` is [`Course::continued`] for the candidate
/// (built once per candidate), needed only when a target is an AUC over a day of therapy.
pub fn evaluate(
    params: &Params,
    candidate: &Regimen,
    targets: &[Target],
    limits: &Limits,
    course: &Course,
    course_doses: Option<&[Dose]>,
) -> Result<Evaluation, InputError> {
    let steady = steady::exposure(params, candidate)?;
    let mut values = Vec::with_capacity(targets.len());
    let verdict =
        judge(params, candidate, &steady, targets, limits, course, course_doses, |v| values.push(v))?;
    Ok(Evaluation {
        steady,
        values,
        meets: verdict.meets,
        over_peak: verdict.over_peak,
        over_trough: verdict.over_trough,
    })
}

/// What a candidate's exposure means for the targets and limits.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Verdict {
    /// Every target met.
    pub meets: bool,
    /// Steady-state peak above the limit.
    pub over_peak: bool,
    /// Steady-state trough above the limit.
    pub over_trough: bool,
}

/// Judge `steady`, the steady-state exposure of `candidate` for `params`, against the targets
/// and limits, handing each target's value to `value` in target order. Nothing is allocated
/// unless a target needs more than the exposure: the periodic curve for a time above a
/// threshold, the dose history for an AUC over a day.
#[inline]
#[allow(clippy::too_many_arguments)] // the evaluation's inputs, passed through unchanged
pub(crate) fn judge(
    params: &Params,
    candidate: &Regimen,
    steady: &Exposure,
    targets: &[Target],
    limits: &Limits,
    course: &Course,
    course_doses: Option<&[Dose]>,
    mut value: impl FnMut(f64),
) -> Result<Verdict, InputError> {
    let mut curve = None;
    let mut meets = true;
    for t in targets {
        let v = match t.metric {
            Metric::Auc24 => steady.auc24_mg_h_l,
            Metric::Trough => steady.trough_mg_l,
            Metric::Peak => steady.peak_mg_l,
            Metric::Cavg => steady.cavg_mg_l,
            Metric::Above { lo_mg_l, hi_mg_l } => {
                // Built once, for the first such target.
                let c = match curve.take() {
                    Some(c) => c,
                    None => SteadyCurve::new(params, *candidate)?,
                };
                let above_hi = if hi_mg_l.is_finite() { c.share_above(hi_mg_l) } else { 0.0 };
                let share = 100.0 * (c.share_above(lo_mg_l) - above_hi).max(0.0);
                curve = Some(c);
                share
            }
            Metric::AucDay { day } => {
                let from = course.therapy_start_h + 24.0 * f64::from(day - 1);
                let doses = course_doses.unwrap_or(course.history);
                engine::auc(params, doses, from, from + 24.0)
            }
        };
        meets &= t.met(v);
        value(v);
    }
    Ok(Verdict {
        meets,
        over_peak: limits.max_peak_mg_l.is_some_and(|m| steady.peak_mg_l > m),
        over_trough: limits.max_trough_mg_l.is_some_and(|m| steady.trough_mg_l > m),
    })
}

/// Dose limits a candidate breaks by itself (whatever the patient's kinetics), as reasons.
pub fn dose_limits_broken(candidate: &Regimen, loading_mg: Option<f64>, limits: &Limits) -> Vec<String> {
    let mut broken = Vec::new();
    let largest = candidate.amount_mg.max(loading_mg.unwrap_or(0.0));
    if let Some(m) = limits.max_dose_mg
        && largest > m
    {
        broken.push(format!("single dose {largest} mg is above the limit of {m} mg"));
    }
    if let Some(m) = limits.max_daily_mg
        && candidate.daily_mg() > m * (1.0 + 1e-12)
    {
        broken.push(format!("daily dose {:.0} mg is above the limit of {m} mg", candidate.daily_mg()));
    }
    if let Some(m) = limits.max_rate_mg_h
        && candidate.route == crate::dosing::Route::Infusion
    {
        let rate = largest / candidate.duration_h;
        if rate > m * (1.0 + 1e-12) {
            broken.push(format!(
                "infusion rate {:.2} mg/min is above the limit of {:.2} mg/min",
                rate / 60.0,
                m / 60.0
            ));
        }
    }
    if let Some(m) = limits.min_every_h
        && candidate.every_h < m
    {
        broken.push(format!("interval {} h is shorter than the minimum of {m} h", candidate.every_h));
    }
    broken
}
