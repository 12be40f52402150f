//! A subject's levels cut into dosing intervals, each a profile of times after its dose, with
//! the levels below the limit handled and the level at the dose time settled.
//!
//! Interval i runs from dose i to dose i + 1 (both ends included: a level at the next dose's
//! time is this interval's last and the next one's pre-dose level); the last runs on without
//! end. Doses given at the same time are one dose of their summed amount.
//!
//! The level at the dose time, where the interval's curve starts:
//! - a level measured then is used as measured: the pre-dose level (the trough) on the
//!   continuous curve of an oral dose or infusion, and C0 for the first dose as a bolus;
//! - a bolus makes the curve jump, so at a later bolus the level at the dose time is the trough
//!   only, and the curve starts, as after a first bolus without one, at the back-extrapolation
//!   of the first two measured levels after the dose, C₁·(C₁/C₂)^(t₁/(t₂ − t₁)), when they fall
//!   (else at the first measured level) — common practice, no source;
//! - without one at the first oral dose or infusion the level is 0 (nothing was given before);
//! - without one at a later oral dose or infusion the interval has no pre-dose level: its areas
//!   from the dose are not computed.

use crate::choice::choice_enum;
use crate::dosing::{Dose, Route};
use crate::fit::SubjectData;
use crate::nca::auc::Sample;

choice_enum! {
    /// What becomes of a level below the quantification limit.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum BlqRule: "BLQ rule" {
        /// Zero before the first measurable level of an interval, left out after it (default, the usual convention).
        ZeroThenDrop = "zero-then-drop",
        /// Zero wherever it is.
        Zero = "zero",
        /// Left out wherever it is.
        Drop = "drop",
    }
}

/// Where an interval's level at the dose time comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Start {
    /// A level measured at the dose time (or a level below the limit counted as zero).
    Measured,
    /// Zero: the first dose, extravascular or an infusion, without a level at its time.
    Zero,
    /// The first dose as an intravenous bolus: back-extrapolated (or the first level).
    BackExtrapolated,
    /// A later dose without a pre-dose level.
    Missing,
}

/// One profile level: its time and concentration, and the line of the levels file it came
/// from (`None` for a level set here, at the dose time).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Point {
    /// Time after the dose and concentration.
    pub sample: Sample,
    /// The levels file's line.
    pub line: Option<u64>,
}

/// One dosing interval as a profile.
#[derive(Debug, Clone)]
pub struct Interval {
    /// 1 for the first dose.
    pub number: usize,
    /// The dose (its amount summed over doses given at the same time).
    pub dose: Dose,
    /// Whether doses of different routes were given at the dose time (no clearance then).
    pub mixed_routes: bool,
    /// The time to the next dose (h); `None` for the last.
    pub to_next_h: Option<f64>,
    /// The levels, times after the dose, sorted; with the level at the dose time unless
    /// [`Start::Missing`].
    pub points: Vec<Point>,
    /// Where the level at the dose time comes from.
    pub start: Start,
    /// The level measured at the dose time before the dose (the trough), when there is one;
    /// never the first bolus's level at its time, which is the curve's start.
    pub predose_mg_l: Option<f64>,
    /// Each level below the limit counted as zero or left out, and the level at the dose time
    /// when set here, in words.
    pub explain: Vec<String>,
}

/// The subject's doses merged by time: (dose, mixed routes).
fn merged_doses(doses: &[Dose]) -> Vec<(Dose, bool)> {
    let mut sorted = doses.to_vec();
    sorted.sort_by(|a, b| a.time_h.total_cmp(&b.time_h));
    let mut merged: Vec<(Dose, bool)> = Vec::new();
    for d in sorted {
        match merged.last_mut() {
            Some((m, mixed)) if m.time_h.total_cmp(&d.time_h).is_eq() => {
                *mixed |= m.route != d.route || m.duration_h.total_cmp(&d.duration_h).is_ne();
                m.amount_mg += d.amount_mg;
            }
            _ => merged.push((d, false)),
        }
    }
    merged
}

/// The subject's dosing intervals that hold at least one level.
pub fn intervals(subject: &SubjectData, blq: BlqRule) -> Vec<Interval> {
    let doses = merged_doses(&subject.doses);
    let mut out = Vec::new();
    for (i, &(dose, mixed_routes)) in doses.iter().enumerate() {
        let next = doses.get(i + 1).map(|(d, _)| d.time_h);
        let levels: Vec<_> = subject
            .levels
            .iter()
            .filter(|l| l.time_h >= dose.time_h && next.is_none_or(|n| l.time_h <= n))
            .collect();
        if levels.is_empty() {
            continue;
        }
        let mut explain = Vec::new();
        let mut points = Vec::new();
        let mut measured_yet = false;
        for l in levels {
            let t = l.time_h - dose.time_h;
            let at = format!("line {}, {} h after the dose", l.line, crate::io::output::full(t));
            match l.conc_mg_l {
                Some(c) => {
                    measured_yet |= c > 0.0;
                    points.push(Point { sample: Sample { t, c }, line: Some(l.line) });
                }
                None => {
                    let zero = match blq {
                        BlqRule::Zero => true,
                        BlqRule::Drop => false,
                        BlqRule::ZeroThenDrop => !measured_yet,
                    };
                    if zero {
                        explain.push(format!("{at}: below the limit, counted as 0"));
                        points.push(Point { sample: Sample { t, c: 0.0 }, line: Some(l.line) });
                    } else {
                        explain.push(format!("{at}: below the limit, left out"));
                    }
                }
            }
        }
        let (start, predose_mg_l) = settle_start(&mut points, dose, i == 0, &mut explain);
        out.push(Interval {
            number: i + 1,
            dose,
            mixed_routes,
            to_next_h: next.map(|n| n - dose.time_h),
            points,
            start,
            predose_mg_l,
            explain,
        });
    }
    out
}

/// Settle the level at the dose time at the front of `points` (see the module documentation):
/// where it comes from, and the pre-dose level when one was measured.
fn settle_start(
    points: &mut Vec<Point>,
    dose: Dose,
    first: bool,
    explain: &mut Vec<String>,
) -> (Start, Option<f64>) {
    let bolus = dose.route == Route::Bolus;
    let at_dose = points.first().filter(|p| p.sample.t <= 0.0).map(|p| p.sample.c);
    match (at_dose, first, bolus) {
        // The first dose's level then (after a bolus, its C0), or a pre-dose level on a
        // continuous curve.
        (Some(_), true, true) => return (Start::Measured, None),
        (Some(c), _, false) => return (Start::Measured, Some(c)),
        (None, false, false) => return (Start::Missing, None),
        _ => {}
    }
    // A bolus: the curve jumps at the dose, so a later dose's pre-dose level is its trough only.
    let predose = at_dose.inspect(|_| {
        points.remove(0);
    });
    let c0 = if bolus {
        let measured: Vec<Sample> = points.iter().map(|p| p.sample).filter(|s| s.c > 0.0).collect();
        match measured[..] {
            [a, b, ..] if b.c < a.c => {
                let c0 = a.c * (a.c / b.c).powf(a.t / (b.t - a.t));
                explain.push(format!(
                    "level at the dose time: {} mg/L, back-extrapolated from the first two levels",
                    crate::io::output::full(c0)
                ));
                c0
            }
            [a, ..] => {
                explain.push(
                    "level at the dose time: the first measured level (the first two do not fall)".into(),
                );
                a.c
            }
            [] => 0.0,
        }
    } else {
        explain.push(format!(
            "level at the dose time: 0 (the first dose, {}, without a level then)",
            dose.route
        ));
        0.0
    };
    points.insert(0, Point { sample: Sample { t: 0.0, c: c0 }, line: None });
    (if bolus { Start::BackExtrapolated } else { Start::Zero }, predose)
}
