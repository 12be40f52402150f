//! Ranking candidate regimens for one subject over the posterior draws of their kinetics.
//!
//! For each candidate: predicted peak, trough and AUC24 (median and 90 % interval over the
//! draws), the probability of target attainment (PTA: the share of draws meeting every target),
//! the probability of exceeding each exposure limit, the dose limits it breaks, and — for the
//! point estimate, continuing the real history — the time until the targets are first met.
//! Ranking: PTA, then the lower daily dose, then the longer interval. The best candidate that
//! breaks no limit is recommended, with a loading dose when one reaches the targets sooner.

use super::targets::{Limits, Metric, Target};
use super::{Course, dose_limits_broken, evaluate, last_day_end};
use crate::dosing::{Regimen, Route};
use crate::engine::{Events, Kinetics, Params, Walker};
use crate::error::InputError;
use crate::stats::interpolated_quantile;
use rayon::prelude::*;
use serde::Serialize;

/// A prediction across the posterior draws.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Band {
    /// Median over the draws.
    pub median: f64,
    /// 5th percentile.
    pub p05: f64,
    /// 95th percentile.
    pub p95: f64,
}

impl Band {
    /// The band of `values` (sorted in place), interpolated between order statistics
    /// ([`interpolated_quantile`]; see [`crate::stats`] for how it differs from the other
    /// percentiles).
    pub fn of(values: &mut [f64]) -> Band {
        values.sort_by(f64::total_cmp);
        let q = |p: f64| interpolated_quantile(values, p);
        Band { median: q(0.5), p05: q(0.05), p95: q(0.95) }
    }
}

/// Predicted steady-state exposure of a candidate.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Predicted {
    /// Steady-state peak (mg/L).
    pub peak_mg_l: Band,
    /// Steady-state trough (mg/L).
    pub trough_mg_l: Band,
    /// Steady-state AUC over 24 h (mg·h/L).
    pub auc24_mg_h_l: Band,
}

/// One candidate's assessment.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Assessment {
    /// The candidate regimen.
    #[serde(flatten)]
    pub regimen: Regimen,
    /// Total over 24 h (mg).
    pub daily_mg: f64,
    /// Probability of target attainment.
    pub pta: f64,
    /// Probability that the steady-state peak exceeds its limit.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub p_over_peak: Option<f64>,
    /// Probability that the steady-state trough exceeds its limit.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub p_over_trough: Option<f64>,
    /// Predictions over the draws.
    pub predicted: Predicted,
    /// Each target's metric over the draws, in target order.
    pub target_values: Vec<Band>,
    /// Hours from the regimen's start until every steady-state target is first met over a
    /// whole interval, for the point estimate; `None` if never within the horizon.
    pub time_to_target_h: Option<f64>,
    /// Why the candidate cannot be recommended (empty when it can).
    pub limits_broken: Vec<String>,
}

/// The recommendation.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Recommendation {
    /// The recommended maintenance regimen.
    #[serde(flatten)]
    pub assessment: Assessment,
    /// A loading dose (mg) for the first dose, when it reaches the targets sooner.
    pub loading_dose_mg: Option<f64>,
    /// Time to target with the loading dose (h).
    pub time_to_target_with_loading_h: Option<f64>,
    /// Time of the regimen's first dose (h).
    pub start_h: f64,
}

/// What planning needs.
#[derive(Debug, Clone)]
pub struct PlanInput<'a> {
    /// Posterior draws of the individual parameters (equal weights).
    pub draws: &'a [Params],
    /// The point estimate.
    pub point: Params,
    /// The real history and where the new regimen starts.
    pub course: Course<'a>,
    /// Candidate regimens.
    pub candidates: &'a [Regimen],
    /// Targets.
    pub targets: &'a [Target],
    /// Limits.
    pub limits: Limits,
    /// Rounding step for a loading dose (mg).
    pub amount_step_mg: f64,
}

/// The plan: every candidate ranked, and the recommendation if any candidate is acceptable.
#[derive(Debug, Clone, Serialize)]
pub struct Plan {
    /// Candidates in ranked order.
    pub candidates: Vec<Assessment>,
    /// The best candidate that breaks no limit.
    pub recommended: Option<Recommendation>,
    /// Why nothing is recommended, or notes on the recommendation.
    pub notes: Vec<String>,
}

fn assess(input: &PlanInput, c: &Regimen) -> Result<Assessment, InputError> {
    let course = &input.course;
    let until = last_day_end(input.targets, course);
    let course_doses = until.map(|u| course.continued(c, None, u));
    let (mut peak, mut trough, mut auc) = (Vec::new(), Vec::new(), Vec::new());
    let (mut met, mut over_peak, mut over_trough) = (0usize, 0usize, 0usize);
    let mut values: Vec<Vec<f64>> = vec![Vec::with_capacity(input.draws.len()); input.targets.len()];
    for p in input.draws {
        let e = evaluate(p, c, input.targets, &input.limits, course, course_doses.as_deref())?;
        for (column, v) in values.iter_mut().zip(&e.values) {
            column.push(*v);
        }
        peak.push(e.steady.peak_mg_l);
        trough.push(e.steady.trough_mg_l);
        auc.push(e.steady.auc24_mg_h_l);
        met += usize::from(e.meets);
        over_peak += usize::from(e.over_peak);
        over_trough += usize::from(e.over_trough);
    }
    let n = input.draws.len() as f64;
    let l = &input.limits;
    let p_over_peak = l.max_peak_mg_l.map(|_| over_peak as f64 / n);
    let p_over_trough = l.max_trough_mg_l.map(|_| over_trough as f64 / n);
    let mut limits_broken = dose_limits_broken(c, None, l);
    for (p, what, limit) in
        [(p_over_peak, "peak", l.max_peak_mg_l), (p_over_trough, "trough", l.max_trough_mg_l)]
    {
        if let (Some(p), Some(limit)) = (p, limit)
            && p > l.max_risk
        {
            limits_broken.push(format!(
                "{:.0} % chance that the steady-state {what} exceeds {limit} mg/L (more than the accepted {:.0} %)",
                100.0 * p,
                100.0 * l.max_risk
            ));
        }
    }
    Ok(Assessment {
        regimen: *c,
        daily_mg: c.daily_mg(),
        pta: met as f64 / n,
        p_over_peak,
        p_over_trough,
        predicted: Predicted {
            peak_mg_l: Band::of(&mut peak),
            trough_mg_l: Band::of(&mut trough),
            auc24_mg_h_l: Band::of(&mut auc),
        },
        target_values: values.iter_mut().map(|v| Band::of(v)).collect(),
        time_to_target_h: time_to_target(&input.point, &input.course, c, None, input.targets),
        limits_broken,
    })
}

/// Samples per interval for the interval peak (oral) and the time-above share.
const SAMPLES_PER_INTERVAL: usize = 96;

/// Hours from the start of `c` (with an optional loading dose) until one whole interval meets
/// every steady-state target, for parameters `p`; targets on a fixed day are not part of it.
pub(crate) fn time_to_target(
    p: &Params,
    course: &Course,
    c: &Regimen,
    loading_mg: Option<f64>,
    targets: &[Target],
) -> Option<f64> {
    let steady: Vec<&Target> = targets.iter().filter(|t| !t.needs_history()).collect();
    if steady.is_empty() {
        return None;
    }
    let k = p.k_per_h();
    // Long enough to come within 0.1 % of steady state, plus two intervals.
    let horizon = (6.9 / k.min(p.ka_per_h.unwrap_or(k))) + 2.0 * c.every_h;
    let intervals = ((horizon / c.every_h).ceil() as usize).clamp(1, 2000);
    let end = course.start_h + intervals as f64 * c.every_h;
    let doses = course.continued(c, loading_mg, end + c.every_h);
    let events = Events::new(&doses, p.tlag_h);
    let first = doses.first().map_or(course.start_h, |d| d.time_h).min(course.start_h);
    let mut w = Walker::new(Kinetics::from(p), &events, first);
    let tau = c.every_h;
    for j in 0..intervals {
        let t0 = course.start_h + j as f64 * tau;
        w.run_to(t0);
        w.restart_auc();
        // Evenly spaced samples, plus the end of an infusion (its peak) in time order.
        let mut times: Vec<f64> =
            (0..SAMPLES_PER_INTERVAL).map(|i| t0 + tau * i as f64 / SAMPLES_PER_INTERVAL as f64).collect();
        if c.route == Route::Infusion {
            times.push(t0 + c.duration_h);
            times.sort_by(f64::total_cmp);
        }
        let mut samples = Vec::with_capacity(times.len() + 1);
        for t in times {
            w.run_to(t);
            samples.push(w.concentration());
        }
        // Just before the next dose (values are right-continuous at a bolus).
        let before_next = t0 + tau * (1.0 - 1e-9);
        w.run_to(before_next);
        let trough = w.concentration();
        samples.push(trough);
        w.run_to(t0 + tau);
        let auc = w.auc();
        let peak = samples.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let ok = steady.iter().all(|t| {
            let v = match t.metric {
                Metric::Auc24 => auc * 24.0 / tau,
                Metric::Cavg => auc / tau,
                Metric::Trough => trough,
                Metric::Peak => peak,
                Metric::Above { lo_mg_l, hi_mg_l } => {
                    let inside = samples.iter().filter(|&&s| s >= lo_mg_l && s <= hi_mg_l).count();
                    100.0 * inside as f64 / samples.len() as f64
                }
                Metric::AucDay { .. } => return true,
            };
            t.met(v)
        });
        if ok {
            return Some((j + 1) as f64 * tau);
        }
    }
    None
}

/// Assess every candidate (in parallel, deterministically), rank, and recommend.
pub fn plan(input: &PlanInput) -> Result<Plan, InputError> {
    if input.draws.is_empty() {
        return Err(InputError::field("draws", "planning needs posterior draws of the subject's parameters"));
    }
    // Collected in candidate order first, so that when several fail the first one's error is
    // reported whatever the thread count.
    let results: Vec<Result<Assessment, InputError>> =
        input.candidates.par_iter().map(|c| assess(input, c)).collect();
    let mut assessed: Vec<Assessment> = results.into_iter().collect::<Result<_, _>>()?;
    assessed.sort_by(|a, b| {
        b.pta
            .total_cmp(&a.pta)
            .then(a.daily_mg.total_cmp(&b.daily_mg))
            .then(b.regimen.every_h.total_cmp(&a.regimen.every_h))
            .then(a.regimen.amount_mg.total_cmp(&b.regimen.amount_mg))
    });
    let mut notes = Vec::new();
    let recommended = assessed.iter().find(|a| a.limits_broken.is_empty()).cloned().map(|a| {
        let c = a.regimen;
        let loading = loading_dose(input, &c);
        let with_loading =
            loading.and_then(|ld| time_to_target(&input.point, &input.course, &c, Some(ld), input.targets));
        let helps = matches!((with_loading, a.time_to_target_h), (Some(w), Some(wo)) if w < wo)
            || (with_loading.is_some() && a.time_to_target_h.is_none());
        Recommendation {
            assessment: a,
            loading_dose_mg: loading.filter(|_| helps),
            time_to_target_with_loading_h: with_loading.filter(|_| helps),
            start_h: input.course.start_h,
        }
    });
    match &recommended {
        None => notes.push("no candidate respects every limit: nothing is recommended".into()),
        Some(r) if r.assessment.pta < 0.5 => notes.push(format!(
            "the best acceptable candidate meets the targets in only {:.0} % of the draws",
            100.0 * r.assessment.pta
        )),
        _ => {}
    }
    Ok(Plan { candidates: assessed, recommended, notes })
}

/// Maintenance dose × accumulation ratio for the point estimate, rounded up to the amount step
/// and kept within the single-dose, rate and daily limits (the first day then holds the loading
/// dose and the maintenance doses after it); `None` when it would not exceed the maintenance dose.
fn loading_dose(input: &PlanInput, c: &Regimen) -> Option<f64> {
    let k = input.point.k_per_h();
    let ratio = 1.0 / -(-k * c.every_h).exp_m1();
    let step = input.amount_step_mg;
    let mut ld = (c.amount_mg * ratio / step - 1e-9).ceil() * step;
    if let Some(max) = input.limits.max_dose_mg {
        ld = ld.min((max / step + 1e-9).floor() * step);
    }
    if let Some(rate) = input.limits.max_rate_mg_h
        && c.route == Route::Infusion
    {
        ld = ld.min((rate * c.duration_h / step + 1e-9).floor() * step);
    }
    if let Some(daily) = input.limits.max_daily_mg {
        // The first 24 h hold the loading dose and the maintenance doses that follow it.
        let doses_in_a_day = (24.0 / c.every_h - 1e-9).ceil().max(1.0);
        let room = daily - (doses_in_a_day - 1.0) * c.amount_mg;
        ld = ld.min((room / step + 1e-9).floor() * step);
    }
    (ld > c.amount_mg * (1.0 + 1e-9)).then_some(ld)
}
