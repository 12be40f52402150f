//! The classic two-level method for intermittent infusions at steady state (Sawchuk RJ,
//! Zaske DE. J Pharmacokinet Biopharm 1976;4:183; citation recalled from memory).
//!
//! Two levels C1 at t1 and C2 at t2, both after the end of one infusion (duration T, rate R)
//! and before the next dose, with the regimen at steady state:
//!
//! ```text
//! k = ln(C1/C2)/(t2 − t1)
//! Cmax = C1·e^(k (t1 − T))            (end of infusion; times after the start of the dose)
//! Cmin = C2·e^(−k (τ − t2))           (just before the next dose)
//! V = R·(1 − e^(−k T)) / (k·(Cmax − Cmin·e^(−k T))),   CL = k·V
//! ```
//! A bolus is the limit T → 0: V = dose / (Cmax − Cmin).

use crate::dosing::{Dose, Route};
use crate::io::levels::Level;
use crate::warning::{Code, Warning};
use serde::Serialize;

/// What the two-level method gives.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TwoLevel {
    /// Elimination rate constant (1/h).
    pub k_per_h: f64,
    /// Volume (L).
    pub v_l: f64,
    /// Clearance (L/h).
    pub cl_l_h: f64,
    /// Extrapolated steady-state peak at the end of the infusion (mg/L).
    pub peak_mg_l: f64,
    /// Extrapolated steady-state trough just before the next dose (mg/L).
    pub trough_mg_l: f64,
    /// The dosing interval used (h).
    pub every_h: f64,
}

/// The method's own computation from the two levels (times after the start of the dose).
pub fn two_level(c1: f64, t1: f64, c2: f64, t2: f64, dose: &Dose, every_h: f64) -> Result<TwoLevel, String> {
    if !(c1 > c2 && c2 > 0.0 && t2 > t1) {
        return Err("the two-level method needs a higher earlier level and a lower later one".into());
    }
    let k = (c1 / c2).ln() / (t2 - t1);
    let t_inf = dose.duration_h;
    let peak = c1 * (k * (t1 - t_inf)).exp();
    let trough = c2 * (-k * (every_h - t2)).exp();
    let v = if dose.route == Route::Infusion {
        let decay = (-k * t_inf).exp();
        dose.rate_mg_h() * -(-k * t_inf).exp_m1() / (k * (peak - trough * decay))
    } else {
        dose.amount_mg / (peak - trough)
    };
    Ok(TwoLevel { k_per_h: k, v_l: v, cl_l_h: k * v, peak_mg_l: peak, trough_mg_l: trough, every_h })
}

/// Apply the method to a subject's history: the two quantified levels must follow the same
/// intravenous dose, after its infusion ends and before the next dose. Returns the estimate and
/// the assumptions it rests on that the data do not show, as warnings.
pub fn from_history(doses: &[Dose], levels: &[Level]) -> Result<(TwoLevel, Vec<Warning>), String> {
    let quantified: Vec<&Level> = levels.iter().filter(|l| !l.is_blq()).collect();
    let [a, b] = quantified[..] else {
        return Err(format!(
            "the two-level method needs exactly two quantified levels, found {}",
            quantified.len()
        ));
    };
    let index = doses.iter().rposition(|d| d.time_h <= a.time_h).ok_or("the levels come before any dose")?;
    let dose = &doses[index];
    if dose.route == Route::Oral {
        return Err("the two-level method is for intravenous doses; use map or wls for oral doses".into());
    }
    let every = match (doses.get(index + 1), index.checked_sub(1).map(|i| &doses[i])) {
        (Some(next), _) => next.time_h - dose.time_h,
        (None, Some(prev)) => dose.time_h - prev.time_h,
        (None, None) => {
            return Err("the two-level method needs a repeated regimen to know the interval".into());
        }
    };
    let (t1, t2) = (a.time_h - dose.time_h, b.time_h - dose.time_h);
    if t1 < dose.duration_h {
        return Err("the first level is drawn during the infusion; both must follow its end".into());
    }
    if t2 >= every {
        return Err("the second level is drawn after the next dose; both must fall in one interval".into());
    }
    let (Some(c1), Some(c2)) = (a.conc_mg_l, b.conc_mg_l) else {
        return Err("both levels must be quantified".into());
    };
    let estimate = two_level(c1, t1, c2, t2, dose, every)?;
    let mut warnings = vec![Warning::new(
        Code::TwoLevelAssumptions,
        "two-level method: assumes steady state, one compartment and complete distribution before the first level",
    )];
    let regular = doses[..=index].windows(2).rev().take_while(|w| {
        (w[1].time_h - w[0].time_h - every).abs() < 1e-6 * every
            && (w[1].amount_mg - w[0].amount_mg).abs() <= 1e-9 * w[0].amount_mg
    });
    let span = regular.count() as f64 * every;
    let half_life = std::f64::consts::LN_2 / estimate.k_per_h;
    if span < 4.0 * half_life {
        warnings.push(Warning::new(
            Code::NotSteadyState,
            format!(
                "the regimen had run {span:.1} h unchanged before the levels, under 4 half-lives ({:.1} h): it may not be at steady state",
                4.0 * half_life
            ),
        ));
    }
    Ok((estimate, warnings))
}
