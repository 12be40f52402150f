//! Sparse (destructive or one-sample) designs: the mean concentration–time curve across
//! subjects and the standard error of its area (Bailer 1988).
//!
//! Levels are grouped by their time after the dose (to 1e-6 h). At each time t_j the r_j
//! levels give a mean ȳ_j and a sample variance s_j². The mean curve's area by the linear
//! trapezoid rule is a weighted sum AUC = Σ w_j·ȳ_j with w_0 = (t_1 − t_0)/2,
//! w_j = (t_{j+1} − t_{j−1})/2, w_J = (t_J − t_{J−1})/2, so with the levels at different times
//! independent (each subject sampled once), Var(AUC) = Σ w_j²·s_j²/r_j, and the 95 % interval
//! is AUC ± z₀.₉₇₅·SE (Bailer AJ, J Pharmacokinet Biopharm 1988;16(3):303–309). The peak of
//! the mean curve has the standard error s_j/√r_j of the mean at its time.
//!
//! These are a population's mean values, not any subject's.

use crate::dosing::Route;
use crate::fit::SubjectData;
use crate::nca::intervals::BlqRule;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal};

/// One time of the mean curve.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MeanPoint {
    /// Time after the dose (h).
    pub time_h: f64,
    /// Levels at this time (0 for the zero set at the dose time).
    pub levels: usize,
    /// Their mean (mg/L).
    pub mean_mg_l: f64,
    /// Their sample standard deviation (mg/L); `None` for a single level.
    pub sd_mg_l: Option<f64>,
}

/// The mean curve and its area with Bailer's standard error.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MeanCurve {
    /// Subjects in the design.
    pub subjects: usize,
    /// Their dose (mg).
    pub dose_mg: f64,
    /// Its route.
    pub route: Route,
    /// AUC of the mean curve from the dose to its last positive mean, linear trapezoids.
    pub auc_last_mg_h_l: f64,
    /// Its standard error (Bailer); `None` when a time has a single level.
    pub auc_last_se_mg_h_l: Option<f64>,
    /// The 95 % interval of the AUC.
    pub auc_last_ci95: Option<[f64; 2]>,
    /// Highest mean level.
    pub cmax_mg_l: f64,
    /// Its standard error.
    pub cmax_se_mg_l: Option<f64>,
    /// Its 95 % interval.
    pub cmax_ci95: Option<[f64; 2]>,
    /// Its time after the dose (h).
    pub tmax_h: f64,
    /// Last time with a positive mean (h).
    pub tlast_h: f64,
    /// The curve.
    pub points: Vec<MeanPoint>,
    /// What the user should know: assumptions that do not hold, values not given.
    pub notes: Vec<String>,
}

/// The standard normal quantile of a two-sided 95 % interval.
fn z975() -> f64 {
    Normal::standard().inverse_cdf(0.975)
}

/// A 95 % interval from an estimate and its standard error.
fn ci95(x: f64, se: Option<f64>) -> Option<[f64; 2]> {
    se.map(|se| [x - z975() * se, x + z975() * se])
}

/// The mean curve of a sparse study: every subject one dose, the same amount and route.
/// A level below the limit counts as zero (left out under [`BlqRule::Drop`]).
pub fn mean_curve(subjects: &[SubjectData], blq: BlqRule) -> Result<MeanCurve, String> {
    let name = |s: &SubjectData| s.id.clone().unwrap_or_else(|| "(single subject)".into());
    let first = subjects.first().ok_or("no subjects with levels")?;
    let mut notes = Vec::new();
    let reference =
        first.doses.first().copied().ok_or_else(|| format!("subject {} has no dose", name(first)))?;
    // Levels grouped by time after the dose, in microhours.
    let mut groups: std::collections::BTreeMap<i64, Vec<f64>> = std::collections::BTreeMap::new();
    let mut several = 0;
    for s in subjects {
        let [dose] = s.doses[..] else {
            return Err(format!(
                "subject {} has {} doses; a sparse design has one dose per subject",
                name(s),
                s.doses.len()
            ));
        };
        if dose.route != reference.route
            || (dose.amount_mg - reference.amount_mg).abs() > 1e-9 * reference.amount_mg
            || (dose.duration_h - reference.duration_h).abs() > 1e-9
        {
            return Err(format!(
                "subject {} has another dose than subject {} (a mean curve needs the same dose, route and duration)",
                name(s),
                name(first)
            ));
        }
        several += usize::from(s.levels.len() > 1);
        for l in &s.levels {
            let c = match (l.conc_mg_l, blq) {
                (Some(c), _) => c,
                (None, BlqRule::Drop) => continue,
                (None, _) => 0.0,
            };
            let key = ((l.time_h - dose.time_h) * 1e6).round() as i64;
            groups.entry(key).or_default().push(c);
        }
    }
    if several > 0 {
        notes.push(format!(
            "{several} subject(s) give more than one level: the standard error assumes the levels at \
             different times independent, as in a destructive design"
        ));
    }
    let mut points: Vec<MeanPoint> = groups
        .into_iter()
        .map(|(key, values)| {
            let n = values.len() as f64;
            let mean = values.iter().sum::<f64>() / n;
            let sd = (values.len() > 1)
                .then(|| (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt());
            MeanPoint { time_h: key as f64 / 1e6, levels: values.len(), mean_mg_l: mean, sd_mg_l: sd }
        })
        .collect();
    if points.first().is_none_or(|p| p.time_h > 0.0) && reference.route != Route::Bolus {
        points.insert(0, MeanPoint { time_h: 0.0, levels: 0, mean_mg_l: 0.0, sd_mg_l: Some(0.0) });
        notes.push("the mean curve starts at 0 at the dose time (no level then)".into());
    }
    let Some(last) = points.iter().rposition(|p| p.mean_mg_l > 0.0) else {
        return Err("every level is below the limit: the mean curve has no area".into());
    };
    if reference.route == Route::Bolus && points[0].time_h > 0.0 {
        notes.push("after a bolus without levels at the dose time the area starts at the first time".into());
    }
    let used = &points[..=last];
    let weights: Vec<f64> = (0..used.len())
        .map(|j| {
            let before = used[j.saturating_sub(1)].time_h;
            let after = used[(j + 1).min(used.len() - 1)].time_h;
            (after - before) / 2.0
        })
        .collect();
    let auc: f64 = used.iter().zip(&weights).map(|(p, w)| w * p.mean_mg_l).sum();
    let variance: Option<f64> = used
        .iter()
        .zip(&weights)
        .map(|(p, w)| match (p.levels, p.sd_mg_l) {
            (0, _) => Some(0.0),
            (n, Some(sd)) => Some(w * w * sd * sd / n as f64),
            (_, None) => None,
        })
        .sum();
    if variance.is_none() {
        notes.push("a time with a single level: no standard error".into());
    }
    let se = variance.map(f64::sqrt);
    let peak = points
        .iter()
        .copied()
        .reduce(|a, b| if b.mean_mg_l > a.mean_mg_l { b } else { a })
        .unwrap_or(points[0]);
    let cmax_se = peak.sd_mg_l.filter(|_| peak.levels > 0).map(|sd| sd / (peak.levels as f64).sqrt());
    Ok(MeanCurve {
        subjects: subjects.len(),
        dose_mg: reference.amount_mg,
        route: reference.route,
        auc_last_mg_h_l: auc,
        auc_last_se_mg_h_l: se,
        auc_last_ci95: ci95(auc, se),
        cmax_mg_l: peak.mean_mg_l,
        cmax_se_mg_l: cmax_se,
        cmax_ci95: ci95(peak.mean_mg_l, cmax_se),
        tmax_h: peak.time_h,
        tlast_h: used[last].time_h,
        points,
        notes,
    })
}
