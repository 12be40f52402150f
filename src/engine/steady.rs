//! Steady state of a repeated regimen, in closed form.
//!
//! Over one dosing interval τ the state maps affinely, x(τ⁻) = Φ(τ)·x(0⁻) + u(τ), where
//! u(τ) is one dose's response from no drug and Φ is the drug-free propagator
//! (A ← A·e^(−kτ) + D·ka·G(τ), D ← D·e^(−ka τ)). Steady state is the fixed point; Φ is
//! triangular, so
//!
//! ```text
//! D_ss = D_u / (1 − e^(−ka τ)),   A_ss = (A_u + ka·G(τ)·D_ss) / (1 − e^(−k τ))
//! ```
//!
//! is the state just before each dose. Peak, trough and AUC then follow from the exact
//! propagator over one interval. A lag time only shifts the periodic curve, so it is computed
//! without the lag and read off at the shifted phase.

use super::kernel::{State, depot_to_central};
use super::{Events, Kinetics, Params, Walker};
use crate::dosing::{Regimen, Route};
use crate::error::InputError;
use serde::Serialize;

/// The exposure of a regimen at steady state.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Exposure {
    /// Highest concentration in an interval (mg/L): end of infusion, the bolus instant, or the
    /// exact oral maximum.
    pub peak_mg_l: f64,
    /// Time of the peak after the dose (h).
    pub peak_time_h: f64,
    /// Concentration just before the next dose (mg/L).
    pub trough_mg_l: f64,
    /// AUC over one interval (mg·h/L).
    pub auc_tau_mg_h_l: f64,
    /// AUC over 24 h at steady state, AUC_τ·24/τ (mg·h/L).
    pub auc24_mg_h_l: f64,
    /// Average concentration AUC_τ/τ (mg/L).
    pub cavg_mg_l: f64,
}

/// Steady-state metrics of a repeated regimen: its exposure and the descriptive extras.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SteadyState {
    /// Peak, trough, AUC and average concentration.
    #[serde(flatten)]
    pub exposure: Exposure,
    /// Accumulation ratio 1/(1 − e^(−kτ)).
    pub accumulation_ratio: f64,
    /// Peak–trough fluctuation 100·(peak − trough)/Cavg (%).
    pub fluctuation_pct: f64,
    /// Time for the regimen to reach 90 % of steady state from no drug (h).
    pub time_to_90pct_h: f64,
    /// Time to 95 % of steady state (h).
    pub time_to_95pct_h: f64,
    /// The first dose that starts the regimen at its steady-state level: maintenance dose ×
    /// accumulation ratio (mg).
    pub loading_dose_mg: f64,
}

/// The periodic steady-state curve of a regimen, for metrics and for reading off any phase.
#[derive(Debug, Clone)]
pub struct SteadyCurve {
    kin: Kinetics<f64>,
    regimen: Regimen,
    events: Events,
    before_dose: State<f64>,
}

impl SteadyCurve {
    /// Solve for the steady state. Returns what is wrong when the regimen has none.
    pub fn new(params: &Params, regimen: Regimen) -> Result<Self, InputError> {
        let one = regimen.dose_at(0.0);
        params.validate(&[one])?;
        regimen.validate()?;
        let tau = regimen.every_h;
        if regimen.route == Route::Infusion && regimen.duration_h > tau {
            return Err(InputError::field(
                "duration_h",
                format!(
                    "the infusion ({} h) is longer than the dosing interval ({tau} h); \
                     simulate the overlapping doses instead",
                    regimen.duration_h
                ),
            ));
        }
        // Lag-free frame: the dose enters at phase 0 (the events ignore the lag; `kin` keeps it
        // for reading the curve off at the phase after the dose is given).
        let kin = Kinetics::from(params);
        let events = Events::new(&[one], 0.0);
        let mut single = Walker::new(kin, &events, 0.0);
        single.run_to(tau);
        let u = single.state();
        let depot = if regimen.route == Route::Oral { u.depot / -(-kin.ka * tau).exp_m1() } else { 0.0 };
        let carried = if depot > 0.0 { kin.ka * depot_to_central(kin.k, kin.ka, tau) * depot } else { 0.0 };
        let central = (u.central + carried) / -(-kin.k * tau).exp_m1();
        Ok(SteadyCurve { kin, regimen, events, before_dose: State { central, depot } })
    }

    fn walker(&self) -> Walker<'_, f64> {
        Walker::from_state(self.kin, &self.events, 0.0, self.before_dose)
    }

    /// Concentration at `phase` hours after the drug enters (lag-free frame), 0 ≤ phase < τ.
    fn at_entry_phase(&self, phase: f64) -> f64 {
        let mut w = self.walker();
        w.run_to(phase);
        w.concentration()
    }

    /// Steady-state concentration `phase` hours after a dose is given (0 ≤ phase < τ).
    pub fn at(&self, phase: f64) -> f64 {
        let tau = self.regimen.every_h;
        let lag = if self.regimen.route == Route::Oral { self.kin.tlag_h } else { 0.0 };
        self.at_entry_phase((phase - lag).rem_euclid(tau))
    }

    /// Peak concentration and its time after the drug enters (lag-free frame).
    fn peak(&self) -> (f64, f64) {
        let tau = self.regimen.every_h;
        match self.regimen.route {
            Route::Bolus => (self.at_entry_phase(0.0), 0.0),
            Route::Infusion => (self.at_entry_phase(self.regimen.duration_h), self.regimen.duration_h),
            Route::Oral => {
                // dC/dt = 0 ⇔ ka·D(s) = k·A(s); with y = (k·A − ka·D)/(ka²·D) just after the
                // dose, s* = −y·ln(1 + (ka − k)·y)/((ka − k)·y)  (→ −y as ka → k).
                let (k, ka) = (self.kin.k, self.kin.ka);
                let a = self.before_dose.central;
                let d = self.before_dose.depot + self.kin.f * self.regimen.amount_mg;
                let mut best = (self.at_entry_phase(0.0), 0.0);
                if d > 0.0 {
                    let y = (k * a - ka * d) / (ka * ka * d);
                    let z = (ka - k) * y;
                    if z > -1.0 {
                        let log_ratio = if z.abs() < 1e-8 { 1.0 - z / 2.0 } else { z.ln_1p() / z };
                        let s = -y * log_ratio;
                        if s > 0.0 && s < tau {
                            let c = self.at_entry_phase(s);
                            if c > best.0 {
                                best = (c, s);
                            }
                        }
                    }
                }
                best
            }
        }
    }

    /// The share (0–1) of each dosing interval at steady state during which the concentration
    /// is at least `threshold` mg/L (time above a threshold).
    ///
    /// In the lag-free frame the curve rises to its peak and then falls, so the time above is
    /// one stretch between a rising and a falling crossing. Intravenous crossings are in closed
    /// form (C = C∞ + (C0 − C∞)·e^(−ks) while infusing, C = Cpeak·e^(−k(s − T)) after);
    /// oral crossings are found by bisection.
    pub fn share_above(&self, threshold: f64) -> f64 {
        let tau = self.regimen.every_h;
        let (peak, peak_at) = self.peak();
        if peak < threshold {
            return 0.0;
        }
        let k = self.kin.k;
        let start = self.before_dose.central / self.kin.v;
        let end = self.at_entry_phase(tau - tau * f64::EPSILON);
        let bisect = |mut lo: f64, mut hi: f64, rising: bool| {
            for _ in 0..60 {
                let mid = 0.5 * (lo + hi);
                if (self.at_entry_phase(mid) >= threshold) == rising {
                    hi = mid;
                } else {
                    lo = mid;
                }
            }
            0.5 * (lo + hi)
        };
        let rise = match self.regimen.route {
            _ if self.at_entry_phase(0.0) >= threshold => 0.0,
            Route::Infusion => {
                let plateau = self.regimen.amount_mg / self.regimen.duration_h / (k * self.kin.v);
                ((start - plateau) / (threshold - plateau)).ln() / k
            }
            _ => bisect(0.0, peak_at, true),
        };
        let fall = match self.regimen.route {
            _ if end >= threshold => tau,
            Route::Oral => bisect(peak_at, tau, false),
            _ => peak_at + (peak / threshold).ln() / k,
        };
        ((fall - rise) / tau).clamp(0.0, 1.0)
    }

    /// The exposure at steady state: peak, trough, AUC and average concentration — what planning
    /// and sweeps evaluate for every draw and subject, without the descriptive extras.
    pub fn exposure(&self) -> Exposure {
        let tau = self.regimen.every_h;
        let lag = if self.regimen.route == Route::Oral { self.kin.tlag_h } else { 0.0 };
        let (peak, peak_entry) = self.peak();
        // Just before the next dose: entry phase τ − (lag mod τ), in (0, τ], so that a bolus
        // given at phase 0 (counted by `at(0)`, values being right-continuous) is not.
        let trough = self.at_entry_phase(tau - lag.rem_euclid(tau));
        let mut w = self.walker();
        w.run_to(tau);
        let auc_tau = w.auc();
        Exposure {
            peak_mg_l: peak,
            peak_time_h: peak_entry + lag,
            trough_mg_l: trough,
            auc_tau_mg_h_l: auc_tau,
            auc24_mg_h_l: auc_tau * 24.0 / tau,
            cavg_mg_l: auc_tau / tau,
        }
    }

    /// All steady-state metrics: the exposure and the descriptive extras.
    pub fn metrics(&self) -> SteadyState {
        let e = self.exposure();
        let tau = self.regimen.every_h;
        let accumulation_ratio = 1.0 / -(-self.kin.k * tau).exp_m1();
        SteadyState {
            exposure: e,
            accumulation_ratio,
            fluctuation_pct: 100.0 * (e.peak_mg_l - e.trough_mg_l) / e.cavg_mg_l,
            time_to_90pct_h: self.time_to_fraction(0.90),
            time_to_95pct_h: self.time_to_fraction(0.95),
            loading_dose_mg: self.regimen.amount_mg * accumulation_ratio,
        }
    }

    /// Time for a constant input to reach `fraction` of its plateau from no drug:
    /// −ln(1 − x)/k for intravenous input; for oral input the absorption delays it and the
    /// time solves 1 − (ka·e^(−kt) − k·e^(−ka t))/(ka − k) = x (found by safeguarded Newton steps).
    pub fn time_to_fraction(&self, fraction: f64) -> f64 {
        let k = self.kin.k;
        let elimination_only = -(-fraction).ln_1p() / k;
        if self.regimen.route != Route::Oral {
            return elimination_only;
        }
        let ka = self.kin.ka;
        // r(t) = e^(−kt) + k·G(t) falls from 1 to 0 with slope r'(t) = −k·ka·G(t): Newton steps,
        // kept inside a bracket that bisection shrinks whenever a step would leave it.
        let remaining = |t: f64| (-k * t).exp() + k * depot_to_central(k, ka, t);
        let target = 1.0 - fraction;
        let (mut lo, mut hi) = (elimination_only, 2.0 * elimination_only);
        // Absorption delays the plateau by a factor of order k/ka at most: 64 doublings
        // (a factor of 1.8e19) bound the bracket for every rate the limits admit.
        for _ in 0..64 {
            if remaining(hi) <= target {
                break;
            }
            lo = hi;
            hi *= 2.0;
        }
        let mut t = 0.5 * (lo + hi);
        for _ in 0..100 {
            let excess = remaining(t) - target;
            if excess > 0.0 {
                lo = t
            } else {
                hi = t
            }
            let newton = t + excess / (k * ka * depot_to_central(k, ka, t));
            let next = if newton > lo && newton < hi { newton } else { 0.5 * (lo + hi) };
            if (next - t).abs() <= 4.0 * f64::EPSILON * t {
                t = next;
                break;
            }
            t = next;
        }
        t + self.kin.tlag_h
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn oral_time_to_fraction_solves_its_equation() {
        // 1 − (ka·e^(−kt) − k·e^(−ka t))/(ka − k) = x at the returned time (less the lag).
        for &(ka, lag) in &[(1.1, 0.0), (0.09, 0.5), (0.0875, 0.0), (12.0, 2.0)] {
            let p = Params { cl_l_h: 4.2, v_l: 48.0, ka_per_h: Some(ka), f: 0.8, tlag_h: lag };
            let dose = Regimen { amount_mg: 500.0, route: Route::Oral, duration_h: 0.0, every_h: 8.0 };
            let curve = SteadyCurve::new(&p, dose).unwrap();
            let k = p.k_per_h();
            for x in [0.5, 0.9, 0.95, 0.999] {
                let t = curve.time_to_fraction(x) - lag;
                let reached = if (ka - k).abs() < 1e-12 {
                    1.0 - (1.0 + k * t) * (-k * t).exp()
                } else {
                    1.0 - (ka * (-k * t).exp() - k * (-ka * t).exp()) / (ka - k)
                };
                assert!((reached - x).abs() < 1e-10, "ka {ka}, x {x}: reached {reached}");
            }
        }
    }
}
