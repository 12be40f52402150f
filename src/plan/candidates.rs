//! Candidate regimens, stated the way prescribers think: amounts in practical steps
//! (`500..3000/250`), intervals from a list (`6h,8h,12h,24h`), infusion durations fixed or
//! derived from the rate limit.

use crate::dosing::{Regimen, Route};
use crate::units::{Kind, parse_value};

/// The most candidates one grid may hold.
pub const MAX_CANDIDATES: usize = 100_000;

/// How infusion durations are chosen.
#[derive(Debug, Clone, PartialEq)]
pub enum Durations {
    /// Each of these durations (h).
    Fixed(Vec<f64>),
    /// The shortest duration that respects the rate limit (mg/h), at least `min_h`, rounded up
    /// to whole `step_h`.
    FromRate {
        /// The rate limit (mg/h).
        max_rate_mg_h: f64,
        /// Shortest duration (h).
        min_h: f64,
        /// Rounding step (h).
        step_h: f64,
    },
}

/// Parse amounts: `LO..HI/STEP` (with units, e.g. `0.5g..3g/250mg`) or a list `500,750,1g`.
pub fn parse_amounts(text: &str) -> Result<Vec<f64>, String> {
    if let Some((range, step)) = text.split_once('/')
        && let Some((lo, hi)) = range.split_once("..")
    {
        let lo = parse_value(Kind::Amount, lo)?;
        let hi = parse_value(Kind::Amount, hi)?;
        let step = parse_value(Kind::Amount, step)?;
        if step <= 0.0 || lo <= 0.0 || hi < lo {
            return Err(format!("expected LO..HI/STEP with 0 < LO <= HI and STEP > 0, found '{text}'"));
        }
        let n = ((hi - lo) / step * (1.0 + 1e-12) + 1e-9).floor() as usize + 1;
        if n > MAX_CANDIDATES {
            return Err(format!("'{text}' gives more than {MAX_CANDIDATES} amounts"));
        }
        return Ok((0..n).map(|i| lo + i as f64 * step).collect());
    }
    positive_list(text, Kind::Amount)
}

/// Parse a comma-separated list of positive values of one kind (`6h,8h,12h`).
pub(crate) fn positive_list(text: &str, kind: Kind) -> Result<Vec<f64>, String> {
    let mut out = Vec::new();
    for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let v = parse_value(kind, part)?;
        if v <= 0.0 {
            return Err(format!("expected a positive {kind}, found '{part}'"));
        }
        out.push(v);
    }
    if out.is_empty() {
        return Err(format!("the list '{text}' is empty"));
    }
    out.sort_by(f64::total_cmp);
    out.dedup();
    Ok(out)
}

/// The candidate grid: every amount × interval (× duration for infusions). Durations longer
/// than the interval are left out.
pub fn grid(
    amounts: &[f64],
    every: &[f64],
    route: Route,
    durations: &Durations,
) -> Result<Vec<Regimen>, String> {
    if amounts.is_empty() || every.is_empty() {
        return Err("the candidate grid is empty: give --amounts and --every".into());
    }
    let mut out = Vec::new();
    for &tau in every {
        for &amount in amounts {
            let options: Vec<f64> = match (route, durations) {
                (Route::Infusion, Durations::Fixed(list)) => list.clone(),
                (Route::Infusion, Durations::FromRate { max_rate_mg_h, min_h, step_h }) => {
                    let need = (amount / max_rate_mg_h).max(*min_h);
                    vec![(need / step_h - 1e-9).ceil() * step_h]
                }
                _ => vec![0.0],
            };
            for d in options.into_iter().filter(|&d| d <= tau) {
                out.push(Regimen { amount_mg: amount, every_h: tau, duration_h: d, route });
                if out.len() > MAX_CANDIDATES {
                    return Err(format!("the grid has more than {MAX_CANDIDATES} candidates"));
                }
            }
        }
    }
    if out.is_empty() {
        return Err("no candidate fits: every infusion duration is longer than its interval".into());
    }
    Ok(out)
}

/// Intervals tried when none are given (h): the usual ones of intermittent dosing (common
/// practice, no source).
pub const DEFAULT_EVERY_H: [f64; 4] = [6.0, 8.0, 12.0, 24.0];

/// The infusion duration tried when none is given and no rate limit derives one (h): common
/// practice for intermittent infusions, no source.
pub const DEFAULT_DURATION_H: f64 = 1.0;

/// The most amounts a default grid holds.
const MAX_DEFAULT_AMOUNTS: f64 = 40.0;

/// Amounts tried when none are given, with their description.
///
/// Every steady-state metric is proportional to the amount (the model is linear), so the amount
/// per dose that puts the first steady-state target (AUC24, trough, peak or average) at the
/// middle of its window for the `point` parameters is the window's middle over the metric of a
/// 1000-mg dose, times 1000 mg. The amounts run from one step to twice the amount needed at the
/// longest interval, in the step of 1, 2, 2.5 or 5 × 10ⁿ mg nearest above a quarter of the amount
/// needed at the shortest interval (fewer than 40 amounts), and never above the largest single
/// dose. A window's middle is (lo + hi)/2; an open lower bound counts as 0 and an open upper
/// bound as twice the lower. A convention of this project.
pub fn default_amounts(
    point: &crate::engine::Params,
    targets: &[crate::plan::targets::Target],
    every: &[f64],
    route: Route,
    duration_h: impl Fn(f64) -> f64,
    max_dose_mg: Option<f64>,
) -> Result<(Vec<f64>, String), String> {
    use crate::engine::steady::SteadyCurve;
    use crate::plan::targets::Metric;
    let (target, middle) = targets
        .iter()
        .find_map(|t| {
            let middle = match (t.lo, t.hi) {
                (Some(lo), Some(hi)) => (lo + hi) / 2.0,
                (None, Some(hi)) => hi / 2.0,
                (Some(lo), None) => 1.5 * lo,
                (None, None) => return None,
            };
            matches!(t.metric, Metric::Auc24 | Metric::Trough | Metric::Peak | Metric::Cavg)
                .then_some((t, middle))
        })
        .ok_or(
            "no steady-state target (auc24, trough, peak or cavg) to derive the amounts from: give them",
        )?;
    let needed = |tau: f64| -> Result<f64, String> {
        let unit =
            Regimen { amount_mg: 1000.0, every_h: tau, duration_h: duration_h(1000.0).min(tau), route };
        let e = SteadyCurve::new(point, unit).map_err(|e| e.message)?.exposure();
        let per_1000 = match target.metric {
            Metric::Auc24 => e.auc24_mg_h_l,
            Metric::Trough => e.trough_mg_l,
            Metric::Peak => e.peak_mg_l,
            _ => e.cavg_mg_l,
        };
        Ok(1000.0 * middle / per_1000)
    };
    let (shortest, longest) =
        (every.iter().copied().fold(f64::INFINITY, f64::min), every.iter().copied().fold(0.0, f64::max));
    let top = 2.0 * needed(longest)?;
    let top = max_dose_mg.map_or(top, |m| top.min(m));
    let step = crate::units::round_step((needed(shortest)? / 4.0).max(top / MAX_DEFAULT_AMOUNTS));
    let n = (top / step + 1e-9).floor() as usize;
    if !(step.is_finite() && n >= 1) {
        return Err(format!(
            "the amounts derived from the {} target are below one step: give them",
            target.name()
        ));
    }
    let amounts: Vec<f64> = (1..=n).map(|i| i as f64 * step).collect();
    let what = format!(
        "amounts {}..{}/{} mg: up to twice the amount per dose that puts {} at {} {} for the point \
         estimate at the longest interval ({} mg every {longest} h)",
        amounts[0],
        amounts[n - 1],
        step,
        target.name(),
        crate::limits::number(middle),
        target.metric.unit(),
        crate::io::output::readable(needed(longest)?, 4)
    );
    Ok((amounts, what))
}

/// The rounding step the candidates' amounts imply: the smallest gap between two of them, or
/// the smallest amount when they are all equal (for rounding a loading dose).
pub fn amount_step(candidates: &[Regimen]) -> f64 {
    let mut amounts: Vec<f64> = candidates.iter().map(|c| c.amount_mg).collect();
    amounts.sort_by(f64::total_cmp);
    amounts.dedup();
    let gap = amounts.windows(2).map(|w| w[1] - w[0]).fold(f64::INFINITY, f64::min);
    if gap.is_finite() { gap } else { amounts.first().copied().unwrap_or(1.0) }
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // grid values are exact
mod tests {
    use super::*;

    #[test]
    fn practical_steps_and_lists() {
        assert_eq!(parse_amounts("500..1500/250").unwrap(), [500.0, 750.0, 1000.0, 1250.0, 1500.0]);
        assert_eq!(parse_amounts("1g,500").unwrap(), [500.0, 1000.0]);
        assert_eq!(positive_list("12h,8h,1d", Kind::Time).unwrap(), [8.0, 12.0, 24.0]);
        assert!(parse_amounts("1500..500/250").is_err());
        assert!(parse_amounts("500..1500/0").is_err());
        assert!(positive_list("", Kind::Time).is_err());
    }

    #[test]
    fn durations_follow_the_rate_limit() {
        // 10 mg/min = 600 mg/h: 1500 mg needs 2.5 h, 500 mg the 1-h minimum.
        let d = Durations::FromRate { max_rate_mg_h: 600.0, min_h: 1.0, step_h: 0.5 };
        let g = grid(&[500.0, 1500.0], &[12.0], Route::Infusion, &d).unwrap();
        assert_eq!(g.iter().map(|c| c.duration_h).collect::<Vec<_>>(), [1.0, 2.5]);
        assert!(grid(&[500.0], &[0.5], Route::Infusion, &d).is_err());
    }
}
