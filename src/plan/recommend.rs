//! Ranking candidate regimens for one subject over the posterior draws of their kinetics.
//!
//! For each candidate: predicted peak, trough and AUC24 (median and 90 % interval over the
//! draws), the probability of target attainment (PTA: the share of draws meeting every target),
//! the probability of exceeding each exposure limit, the dose limits it breaks, and — for the
//! point estimate, continuing the real history — the time until the targets are first met.
//! Ranking: PTA, then the lower daily dose, then the longer interval. The best candidate that
//! breaks no limit is recommended, with a loading dose when one reaches the targets sooner.

use super::targets::{Limits, Metric, Target};
use super::{Course, dose_limits_broken, judge, last_day_end};
use crate::dosing::{Regimen, Route};
use crate::engine::steady::{self, Exposure};
use crate::engine::{Events, Kinetics, Params, Walker};
use crate::error::InputError;
use crate::stats::{interpolated_quantile, interpolated_quantile_of};
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

/// The draws' exposure to 1 mg of one dosing shape (route, interval, infusion duration): the
/// exposure to any amount of that shape is this times the amount ([`Exposure::scaled`], the
/// very products [`steady::exposure`] computes), and multiplying by a positive amount keeps the
/// order, so every candidate of the shape reads its bands off these columns, sorted once.
struct Shape {
    /// Each draw's exposure to 1 mg.
    unit: Vec<Exposure>,
    /// The draws' peaks to 1 mg, ascending; likewise the troughs, AUC24s and average
    /// concentrations.
    peak: Vec<f64>,
    trough: Vec<f64>,
    auc24: Vec<f64>,
    cavg: Vec<f64>,
}

impl Shape {
    /// The shape of `regimen`, whose own values passed the engine's checks: an error is then the
    /// first draw the engine refuses for the route, as it would be for every candidate of the
    /// shape.
    fn new(draws: &[Params], regimen: &Regimen) -> Result<Shape, InputError> {
        let unit: Vec<Exposure> =
            draws.iter().map(|p| steady::unit_exposure(p, regimen)).collect::<Result<_, _>>()?;
        let column = |value: fn(&Exposure) -> f64| {
            let mut v: Vec<f64> = unit.iter().map(value).collect();
            // Values equal by total_cmp are the same bits: an unstable sort gives the same column.
            v.sort_unstable_by(f64::total_cmp);
            v
        };
        let (peak, trough) = (column(|e| e.peak_mg_l), column(|e| e.trough_mg_l));
        let (auc24, cavg) = (column(|e| e.auc24_mg_h_l), column(|e| e.cavg_mg_l));
        Ok(Shape { unit, peak, trough, auc24, cavg })
    }

    /// The sorted column of a steady-state metric; `None` for the metrics that are not
    /// proportional to the amount (time in a window, AUC over a day of therapy).
    fn column(&self, metric: Metric) -> Option<&[f64]> {
        match metric {
            Metric::Peak => Some(&self.peak),
            Metric::Trough => Some(&self.trough),
            Metric::Auc24 => Some(&self.auc24),
            Metric::Cavg => Some(&self.cavg),
            Metric::Above { .. } | Metric::AucDay { .. } => None,
        }
    }
}

/// The band of `amount_mg` times each value of the ascending `column`, the band of the scaled
/// values exactly.
fn scaled_band(column: &[f64], amount_mg: f64) -> Band {
    let q = |p: f64| interpolated_quantile_of(column.len(), p, |k| column[k] * amount_mg);
    Band { median: q(0.5), p05: q(0.05), p95: q(0.95) }
}

fn assess(input: &PlanInput, c: &Regimen, shape: &Shape) -> Result<Assessment, InputError> {
    let course = &input.course;
    let until = last_day_end(input.targets, course);
    let course_doses = until.map(|u| course.continued(c, None, u));
    let (mut met, mut over_peak, mut over_trough) = (0usize, 0usize, 0usize);
    // Each target's sorted column to 1 mg, when the shape has one; the other targets' values
    // are collected draw by draw.
    let columns: Vec<Option<&[f64]>> = input.targets.iter().map(|t| shape.column(t.metric)).collect();
    let mut values: Vec<Vec<f64>> = columns
        .iter()
        .map(|column| Vec::with_capacity(if column.is_some() { 0 } else { input.draws.len() }))
        .collect();
    for (p, unit) in input.draws.iter().zip(&shape.unit) {
        let steady = unit.scaled(c.amount_mg);
        let mut targets = columns.iter().zip(values.iter_mut());
        let verdict =
            judge(p, c, &steady, input.targets, &input.limits, course, course_doses.as_deref(), |v| {
                if let Some((None, values)) = targets.next() {
                    values.push(v);
                }
            })?;
        met += usize::from(verdict.meets);
        over_peak += usize::from(verdict.over_peak);
        over_trough += usize::from(verdict.over_trough);
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
    let band = |column: &[f64]| scaled_band(column, c.amount_mg);
    Ok(Assessment {
        regimen: *c,
        daily_mg: c.daily_mg(),
        pta: met as f64 / n,
        p_over_peak,
        p_over_trough,
        predicted: Predicted {
            peak_mg_l: band(&shape.peak),
            trough_mg_l: band(&shape.trough),
            auc24_mg_h_l: band(&shape.auc24),
        },
        target_values: columns
            .iter()
            .zip(&mut values)
            .map(|(column, v)| column.map_or_else(|| Band::of(v), band))
            .collect(),
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
    // A candidate's own values are checked with the first draw, which gives the error that
    // candidate's first draw would; the draws are then evaluated once per dosing shape, with
    // the first candidate of the shape that passed as its regimen.
    let unit = |c: &Regimen| Regimen { amount_mg: 1.0, ..*c };
    let mut regimens: Vec<Regimen> = Vec::new();
    let shape_of: Vec<Result<usize, InputError>> = input
        .candidates
        .iter()
        .map(|c| {
            steady::unit_exposure(&input.draws[0], c).map(|_| {
                regimens.iter().position(|r| unit(r) == unit(c)).unwrap_or_else(|| {
                    regimens.push(*c);
                    regimens.len() - 1
                })
            })
        })
        .collect();
    let shapes: Vec<Result<Shape, InputError>> =
        regimens.par_iter().map(|r| Shape::new(input.draws, r)).collect();
    // Collected in candidate order first, so that when several fail the first one's error is
    // reported whatever the thread count.
    let results: Vec<Result<Assessment, InputError>> = input
        .candidates
        .par_iter()
        .zip(shape_of)
        .map(|(c, shape)| shapes[shape?].as_ref().map_err(Clone::clone).and_then(|s| assess(input, c, s)))
        .collect();
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

#[cfg(test)]
#[allow(clippy::float_cmp)] // equality to the bit is what the tests assert
mod tests {
    use super::*;
    use crate::dosing::Dose;
    use crate::plan::evaluate;
    use crate::plan::targets::parse_target;

    /// Varied draws, some repeated (as resampling repeats them), with absorption.
    fn draws(n: usize) -> Vec<Params> {
        (0..n)
            .map(|i| {
                let x = ((i * 7919) % 97) as f64 / 97.0;
                let y = ((i * 104_729) % 89) as f64 / 89.0;
                let j = if i % 5 == 4 { i - 1 } else { i };
                let z = ((j * 31) % 13) as f64 / 13.0;
                Params {
                    cl_l_h: 2.0 + 4.0 * x + z,
                    v_l: 20.0 + 40.0 * y,
                    ka_per_h: Some(0.5 + 2.0 * z),
                    f: 0.6 + 0.4 * x,
                    tlag_h: if i % 3 == 0 { 0.0 } else { 0.25 * z },
                }
            })
            .collect()
    }

    fn candidates() -> Vec<Regimen> {
        let mut c = Vec::new();
        for (route, duration_h) in
            [(Route::Infusion, 1.0), (Route::Infusion, 2.0), (Route::Oral, 0.0), (Route::Bolus, 0.0)]
        {
            for every_h in [8.0, 12.0, 24.0] {
                for amount_mg in [250.0, 500.0, 750.0, 1000.0, 1750.0] {
                    c.push(Regimen { amount_mg, every_h, duration_h, route });
                }
            }
        }
        c
    }

    /// Every candidate's assessment is what evaluating each draw on its own and sorting the
    /// values gives, to the bit: shares, bands and the targets' bands, for every metric.
    #[test]
    fn each_shape_s_columns_give_the_draw_by_draw_assessment_to_the_bit() {
        let draws = draws(301);
        let candidates = candidates();
        let history = [Dose { time_h: 0.0, amount_mg: 500.0, route: Route::Infusion, duration_h: 1.0 }];
        let course = Course { history: &history, start_h: 12.0, therapy_start_h: 0.0 };
        let targets: Vec<Target> =
            ["auc24=300..600", "trough=..12", "peak=..40", "cavg=10..", "above=5..@50%", "auc_day2=200.."]
                .iter()
                .map(|t| parse_target(t).unwrap())
                .collect();
        let limits = Limits { max_peak_mg_l: Some(45.0), max_trough_mg_l: Some(15.0), ..Limits::default() };
        let input = PlanInput {
            draws: &draws,
            point: draws[0],
            course,
            candidates: &candidates,
            targets: &targets,
            limits,
            amount_step_mg: 250.0,
        };
        let planned = plan(&input).unwrap();
        assert_eq!(planned.candidates.len(), candidates.len());
        let shares = |a: &Assessment| [a.pta, a.p_over_peak.unwrap(), a.p_over_trough.unwrap()];
        for k in 0..3 {
            let split =
                planned.candidates.iter().filter(|a| shares(a)[k] > 0.0 && shares(a)[k] < 1.0).count();
            assert!(split > 0, "share {k}: no candidate splits the draws, the test would not see a miscount");
        }
        let bits = |b: &Band| [b.median, b.p05, b.p95].map(f64::to_bits);
        for a in &planned.candidates {
            let c = a.regimen;
            let doses = last_day_end(&targets, &course).map(|u| course.continued(&c, None, u));
            let each: Vec<_> = draws
                .iter()
                .map(|p| evaluate(p, &c, &targets, &limits, &course, doses.as_deref()).unwrap())
                .collect();
            let band = |value: &dyn Fn(&crate::plan::Evaluation) -> f64| {
                Band::of(&mut each.iter().map(value).collect::<Vec<_>>())
            };
            let n = draws.len() as f64;
            assert_eq!(a.pta, each.iter().filter(|e| e.meets).count() as f64 / n, "{c:?}");
            assert_eq!(a.p_over_peak, Some(each.iter().filter(|e| e.over_peak).count() as f64 / n));
            assert_eq!(a.p_over_trough, Some(each.iter().filter(|e| e.over_trough).count() as f64 / n));
            assert_eq!(bits(&a.predicted.peak_mg_l), bits(&band(&|e| e.steady.peak_mg_l)), "{c:?}");
            assert_eq!(bits(&a.predicted.trough_mg_l), bits(&band(&|e| e.steady.trough_mg_l)), "{c:?}");
            assert_eq!(bits(&a.predicted.auc24_mg_h_l), bits(&band(&|e| e.steady.auc24_mg_h_l)), "{c:?}");
            for (k, got) in a.target_values.iter().enumerate() {
                assert_eq!(bits(got), bits(&band(&|e| e.values[k])), "{c:?}, target {k}");
            }
        }
    }

    /// A refused candidate or draw stops the plan with the error of the first candidate, in
    /// grid order, whose draw-by-draw evaluation fails: at its first failing draw.
    #[test]
    fn a_refusal_is_the_one_the_draw_by_draw_evaluation_meets_first() {
        let targets = [parse_target("auc24=300..600").unwrap()];
        let limits = Limits::default();
        let first_failure = |draws: &[Params], candidates: &[Regimen]| {
            candidates.iter().find_map(|c| {
                draws.iter().find_map(|p| evaluate(p, c, &targets, &limits, &Course::fresh(), None).err())
            })
        };
        let infusion = |amount_mg: f64, every_h: f64| Regimen {
            amount_mg,
            every_h,
            duration_h: 1.0,
            route: Route::Infusion,
        };
        let oral = Regimen { amount_mg: 500.0, every_h: 12.0, duration_h: 0.0, route: Route::Oral };
        let mut bad_draw = draws(40);
        bad_draw[17].cl_l_h = -1.0;
        let mut bad_first = draws(40);
        bad_first[0].v_l = 0.0;
        let no_ka: Vec<Params> = draws(40).into_iter().map(|p| Params { ka_per_h: None, ..p }).collect();
        let cases: Vec<(Vec<Params>, Vec<Regimen>)> = vec![
            // A draw refused for every shape, after the first.
            (bad_draw.clone(), vec![infusion(500.0, 12.0), infusion(750.0, 12.0)]),
            // A candidate's own value refused (its first draw fails) before a refused draw.
            (bad_draw, vec![infusion(0.0, 24.0), infusion(500.0, 12.0), infusion(500.0, 24.0)]),
            (draws(40), vec![infusion(500.0, 12.0), infusion(500.0, 0.5), infusion(-1.0, 12.0)]),
            // The first draw refused: before the candidate's own value.
            (bad_first, vec![infusion(0.0, 12.0), infusion(500.0, 12.0)]),
            // Oral candidates for draws without absorption, the shape's first amount refused.
            (no_ka, vec![infusion(500.0, 12.0), Regimen { amount_mg: 0.0, ..oral }, oral]),
        ];
        for (draws, candidates) in cases {
            let input = PlanInput {
                draws: &draws,
                point: draws[0],
                course: Course::fresh(),
                candidates: &candidates,
                targets: &targets,
                limits,
                amount_step_mg: 250.0,
            };
            let expected = first_failure(&draws, &candidates).expect("a refusal");
            assert_eq!(plan(&input).unwrap_err(), expected, "{candidates:?}");
        }
    }
}
