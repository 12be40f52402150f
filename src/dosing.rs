//! Dose events and regimens.
//!
//! A dose history is a list of [`Dose`]s in any order; a [`Regimen`] is the repeated dose a
//! prescriber writes ("1 g over 1 h every 12 h"), and a [`Schedule`] gives it a number of
//! times from a start ("…, 6 doses") so that it expands into a history.

use crate::error::InputError;
use crate::io::output::plain;
use serde::{Deserialize, Serialize};
use std::fmt;

/// How a dose enters the body.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Hash)]
#[serde(rename_all = "lowercase")]
pub enum Route {
    /// Instantaneous intravenous input.
    Bolus,
    /// Zero-order (constant-rate) intravenous input over a stated duration.
    Infusion,
    /// First-order absorption from a depot, with bioavailability and lag time.
    Oral,
}

impl Route {
    /// Parse the spelling used in files and flags.
    pub fn parse(text: &str) -> Option<Route> {
        let text = text.trim();
        [Route::Bolus, Route::Infusion, Route::Oral].into_iter().find(|r| r.name().eq_ignore_ascii_case(text))
    }

    /// The spelling used in files and flags.
    fn name(self) -> &'static str {
        match self {
            Route::Bolus => "bolus",
            Route::Infusion => "infusion",
            Route::Oral => "oral",
        }
    }
}

impl fmt::Display for Route {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// One administered dose, in base units.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Dose {
    /// Time the dose was given (h).
    pub time_h: f64,
    /// Amount given (mg). For oral doses, before bioavailability.
    pub amount_mg: f64,
    /// Route of administration.
    pub route: Route,
    /// Infusion duration (h); zero for bolus and oral doses.
    pub duration_h: f64,
}

impl Dose {
    /// Check the dose's values, returning what is wrong.
    pub fn validate(&self) -> Result<(), InputError> {
        validate_dose(self.amount_mg, self.route, self.duration_h)?;
        if !self.time_h.is_finite() {
            return Err(InputError::field("start_h", "the dose time must be a finite number"));
        }
        Ok(())
    }

    /// An infusion's constant input rate (mg/h).
    pub fn rate_mg_h(&self) -> f64 {
        self.amount_mg / self.duration_h
    }
}

/// A repeated dose as a prescriber writes it ("750 mg infusion over 1.5 h every 12 h"): the one
/// regimen type of planning, sweeps and steady state. The field order is the column order of
/// every output that lists a regimen.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Regimen {
    /// Amount of each dose (mg). For oral doses, before bioavailability.
    pub amount_mg: f64,
    /// Dosing interval (h).
    pub every_h: f64,
    /// Infusion duration (h); zero for bolus and oral.
    pub duration_h: f64,
    /// Route of each dose.
    pub route: Route,
}

impl Regimen {
    /// Check the regimen's values, returning what is wrong. Unlike one recorded dose (which
    /// may be 0: a dose held), a regimen of 0 mg cannot be meant: its exposure is 0 and its
    /// fluctuation and loading dose are undefined.
    pub fn validate(&self) -> Result<(), InputError> {
        validate_dose(self.amount_mg, self.route, self.duration_h)?;
        if self.amount_mg <= 0.0 {
            return Err(InputError::field("amount_mg", "a regimen's dose must be above 0 mg"));
        }
        if !(self.every_h.is_finite() && self.every_h > 0.0) {
            return Err(InputError::field(
                "every_h",
                format!("the dosing interval must be positive, found {} h", self.every_h),
            ));
        }
        Ok(())
    }

    /// The regimen's dose given at `time_h`.
    pub fn dose_at(&self, time_h: f64) -> Dose {
        Dose { time_h, amount_mg: self.amount_mg, route: self.route, duration_h: self.duration_h }
    }

    /// The regimen as a prescriber writes it: `750 mg infusion over 1.5 h every 12 h`.
    pub fn describe(&self) -> String {
        let over =
            if self.duration_h > 0.0 { format!(" over {} h", plain(self.duration_h)) } else { String::new() };
        format!("{} mg {}{over} every {} h", plain(self.amount_mg), self.route, plain(self.every_h))
    }

    /// Total amount over 24 h (mg).
    pub fn daily_mg(&self) -> f64 {
        self.amount_mg * 24.0 / self.every_h
    }
}

/// A regimen given a stated number of times from a start time: a finite dose history
/// ("… 6 doses from 0 h").
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Schedule {
    /// The repeated dose.
    pub regimen: Regimen,
    /// Number of doses.
    pub count: u32,
    /// Time of the first dose (h).
    pub start_h: f64,
}

impl Schedule {
    /// Check the schedule's values, returning what is wrong.
    pub fn validate(&self) -> Result<(), InputError> {
        self.regimen.validate()?;
        if self.count == 0 {
            return Err(InputError::field("count", "the dose count must be at least 1"));
        }
        crate::limits::check_doses(u64::from(self.count)).map_err(|m| InputError::field("count", m))?;
        if !self.start_h.is_finite() {
            return Err(InputError::field("start_h", "the start time must be a finite number"));
        }
        Ok(())
    }

    /// The dose history this schedule describes.
    pub fn doses(&self) -> Vec<Dose> {
        (0..self.count)
            .map(|i| self.regimen.dose_at(self.start_h + f64::from(i) * self.regimen.every_h))
            .collect()
    }
}

/// Check one dose's amount, route and duration, returning what is wrong.
pub(crate) fn validate_dose(amount_mg: f64, route: Route, duration_h: f64) -> Result<(), InputError> {
    if !(amount_mg.is_finite() && amount_mg >= 0.0) {
        return Err(InputError::field(
            "amount_mg",
            format!("the amount must be a non-negative number, found {amount_mg} mg"),
        ));
    }
    match route {
        Route::Infusion if !(duration_h.is_finite() && duration_h > 0.0) => Err(InputError::field(
            "duration_h",
            if duration_h == 0.0 {
                "an infusion needs its duration (a positive time)".to_string()
            } else {
                format!("an infusion needs a positive duration, found {duration_h} h")
            },
        )),
        Route::Bolus | Route::Oral if duration_h != 0.0 => Err(InputError::field(
            "duration_h",
            format!("a duration is only meaningful for an infusion, not for {route} doses"),
        )),
        _ => Ok(()),
    }
}
