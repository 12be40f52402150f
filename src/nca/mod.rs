//! Non-compartmental analysis: exposure summarised from the levels alone, without a model.
//!
//! Per subject and dosing interval ([`intervals`]): the peak and last levels, areas by the
//! chosen rule ([`auc`]), the terminal rate constant λz ([`lambda_z`]) with the areas to
//! infinity it gives, clearance and volumes after the first dose, the dosing-interval metrics
//! (AUCτ, Cavg, fluctuation, swing, accumulation), partial areas and dose-normalised values.
//! For sparse designs the mean curve across subjects with Bailer's standard error of its
//! area ([`sparse`]). docs/methods.md gives every formula and its source.

pub mod auc;
pub mod compare;
pub mod intervals;
pub mod lambda_z;
pub mod plot;
pub mod pp;
pub mod sparse;

use crate::dosing::Route;
use crate::fit::SubjectData;
use auc::{AucRule, Curve, Sample};
use intervals::{BlqRule, Interval, Start};
use lambda_z::Terminal;
use rayon::prelude::*;
use serde::Serialize;

/// The share of AUC0–∞ extrapolated past the last level above which a warning is given
/// (common practice, no source).
pub const EXTRAPOLATED_WARNING_PCT: f64 = 20.0;

/// Which levels the terminal line goes through.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub enum LambdaZChoice {
    /// The automatic choice of [`lambda_z::automatic`].
    #[default]
    Automatic,
    /// Every measurable level whose time after the dose lies in [from, to] (h).
    Window(f64, f64),
    /// The measurable levels at the times listed for the subject (`NcaOptions::lambda_z_times`).
    Listed,
}

/// How the analysis is done.
#[derive(Debug, Clone, PartialEq)]
pub struct NcaOptions {
    /// The rule for the areas between levels.
    pub auc_rule: AucRule,
    /// What becomes of levels below the limit.
    pub blq: BlqRule,
    /// The terminal line's levels.
    pub lambda_z: LambdaZChoice,
    /// Partial areas asked for: (from, to) in hours after each dose.
    pub partials: Vec<(f64, f64)>,
    /// The levels of the terminal line listed per subject (times on the levels file's clock);
    /// a subject listed here takes them instead of `lambda_z`.
    pub lambda_z_times: lambda_z::ChosenTimes,
}

impl Default for NcaOptions {
    /// The defaults of `cistern nca` (the report's NCA section uses them too).
    fn default() -> Self {
        NcaOptions {
            auc_rule: AucRule::LinearUpLogDown,
            blq: BlqRule::ZeroThenDrop,
            lambda_z: LambdaZChoice::Automatic,
            partials: Vec::new(),
            lambda_z_times: Default::default(),
        }
    }
}

/// A partial area: AUC between two times after the dose.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PartialAuc {
    /// From (h after the dose).
    pub from_h: f64,
    /// To (h after the dose).
    pub to_h: f64,
    /// The area (mg·h/L); `None` when the levels do not cover it.
    pub auc_mg_h_l: Option<f64>,
}

/// Clearance and volumes, under the names of the route: intravenous values, or divided by the
/// unknown bioavailability after oral doses.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(untagged)]
pub enum Disposition {
    /// After intravenous doses (bolus or infusion).
    Intravenous {
        /// Clearance (L/h).
        cl_l_h: Option<f64>,
        /// Volume of the terminal phase (L).
        vz_l: Option<f64>,
        /// Volume at steady state MRT·CL (L).
        vss_l: Option<f64>,
    },
    /// After oral doses.
    Oral {
        /// Apparent clearance CL/F (L/h).
        cl_f_l_h: Option<f64>,
        /// Apparent volume of the terminal phase Vz/F (L).
        vz_f_l: Option<f64>,
    },
}

impl Disposition {
    /// (CL or CL/F, Vz or Vz/F, Vss).
    pub fn values(&self) -> (Option<f64>, Option<f64>, Option<f64>) {
        match *self {
            Disposition::Intravenous { cl_l_h, vz_l, vss_l } => (cl_l_h, vz_l, vss_l),
            Disposition::Oral { cl_f_l_h, vz_f_l } => (cl_f_l_h, vz_f_l, None),
        }
    }
}

/// The non-compartmental results of one subject's dosing interval. Times are hours after the
/// interval's dose; a value that the levels do not give is `None` (with a note saying why).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct IntervalNca {
    /// The subject (`None` for a single unnamed subject).
    pub subject: Option<String>,
    /// The dose's number in the subject's history (1 for the first).
    pub interval: usize,
    /// When the dose was given (h, the files' clock).
    pub dose_time_h: f64,
    /// The dose (mg).
    pub dose_mg: f64,
    /// Its route.
    pub route: Route,
    /// The dosing interval τ (h): to the next dose, or for the last dose the one before it.
    pub tau_h: Option<f64>,
    /// Highest measured level.
    pub cmax_mg_l: Option<f64>,
    /// Its time (the first, if reached twice).
    pub tmax_h: Option<f64>,
    /// Last measurable (positive) level.
    pub clast_mg_l: Option<f64>,
    /// Its time.
    pub tlast_h: Option<f64>,
    /// Time of the first measurable level.
    pub tfirst_h: Option<f64>,
    /// AUC from the dose to the last measurable level.
    pub auc_last_mg_h_l: Option<f64>,
    /// Its first moment (AUMC).
    pub aumc_last_mg_h2_l: Option<f64>,
    /// λz.
    pub lambda_z_per_h: Option<f64>,
    /// R² of the terminal line.
    pub lambda_z_r2: Option<f64>,
    /// Its adjusted R².
    pub lambda_z_adj_r2: Option<f64>,
    /// Levels on it.
    pub lambda_z_points: Option<usize>,
    /// Its first level's time.
    pub lambda_z_from_h: Option<f64>,
    /// Its last level's time.
    pub lambda_z_to_h: Option<f64>,
    /// ln 2/λz.
    pub half_life_h: Option<f64>,
    /// AUC to infinity with the observed last level: AUClast + Clast/λz (first dose).
    pub auc_inf_obs_mg_h_l: Option<f64>,
    /// AUC to infinity with the line's last level: AUClast + Ĉlast/λz (first dose).
    pub auc_inf_pred_mg_h_l: Option<f64>,
    /// The extrapolated share of AUC0–∞ (observed), %.
    pub auc_extrap_pct: Option<f64>,
    /// AUMC to infinity (observed).
    pub aumc_inf_obs_mg_h2_l: Option<f64>,
    /// Mean residence time AUMC∞/AUC∞, less half the infusion duration (first dose).
    pub mrt_h: Option<f64>,
    /// Clearance and volumes.
    #[serde(flatten)]
    pub disposition: Disposition,
    /// AUC over the dosing interval, from the dose to τ.
    pub auc_tau_mg_h_l: Option<f64>,
    /// AUCτ/τ.
    pub cavg_mg_l: Option<f64>,
    /// Lowest measured level in [0, τ].
    pub cmin_mg_l: Option<f64>,
    /// Level measured at the dose time before the dose (pre-dose).
    pub ctrough_mg_l: Option<f64>,
    /// (Cmax − Cmin)/Cavg, %.
    pub fluctuation_pct: Option<f64>,
    /// (Cmax − Cmin)/Cmin, %.
    pub swing_pct: Option<f64>,
    /// AUCτ over the first dose's AUCτ.
    pub accumulation_ratio: Option<f64>,
    /// Cmax per mg of dose (1/L).
    pub cmax_per_dose_per_l: Option<f64>,
    /// AUClast per mg of dose (h/L).
    pub auc_last_per_dose_h_l: Option<f64>,
    /// AUC∞ (observed) per mg of dose (h/L).
    pub auc_inf_obs_per_dose_h_l: Option<f64>,
    /// The partial areas asked for.
    pub partial_aucs: Vec<PartialAuc>,
    /// What could not be computed and why, and warnings (a large extrapolated share).
    pub notes: Vec<String>,
    /// Every level below the limit counted as zero or left out, the level at the dose time
    /// and the terminal line's choice, in words (`--explain`).
    #[serde(skip)]
    pub explain: Vec<String>,
    /// The measured levels (times after the dose; below the limit as zero when counted so),
    /// for plots.
    #[serde(skip)]
    pub levels: Vec<Sample>,
    /// The terminal line, for plots.
    #[serde(skip)]
    pub terminal: Option<Terminal>,
}

/// The analysis of every subject of a study: one result per dosing interval with levels, in
/// the subjects' order. Subjects are independent, so they are analysed in parallel (rayon).
pub fn analyse(subjects: &[SubjectData], options: &NcaOptions) -> Vec<IntervalNca> {
    subjects.par_iter().flat_map_iter(|s| analyse_subject(s, options)).collect()
}

/// One subject's intervals.
pub fn analyse_subject(subject: &SubjectData, options: &NcaOptions) -> Vec<IntervalNca> {
    let all = intervals::intervals(subject, options.blq);
    let several = subject.doses.len() > 1;
    // The last dose's interval is taken as the one before it (the regimen's).
    let last_tau = all.iter().rev().find_map(|i| i.to_next_h);
    let mut results: Vec<IntervalNca> = all
        .iter()
        .map(|i| {
            let tau = i.to_next_h.or(if several { last_tau } else { None });
            let listed = options
                .lambda_z_times
                .get(&subject.id)
                .map(|times| times.iter().map(|t| t - i.dose.time_h).collect::<Vec<f64>>());
            analyse_interval(subject.id.clone(), i, tau, options, listed.as_deref())
        })
        .collect();
    let first_tau_auc = results.iter().find(|r| r.interval == 1).and_then(|r| r.auc_tau_mg_h_l);
    for r in results.iter_mut().filter(|r| r.interval > 1) {
        r.accumulation_ratio =
            r.auc_tau_mg_h_l.zip(first_tau_auc).map(|(a, b)| a / b).filter(|x| x.is_finite());
    }
    results
}

/// A ratio when both sides are there and the divisor is positive.
fn ratio(a: Option<f64>, b: Option<f64>) -> Option<f64> {
    a.zip(b).filter(|(_, b)| *b > 0.0).map(|(a, b)| a / b)
}

/// One interval's results; `listed` holds the times (after the dose) chosen for its terminal
/// line, when the subject's were listed.
fn analyse_interval(
    subject: Option<String>,
    interval: &Interval,
    tau: Option<f64>,
    options: &NcaOptions,
    listed: Option<&[f64]>,
) -> IntervalNca {
    let mut notes = Vec::new();
    let mut explain = interval.explain.clone();
    let samples: Vec<Sample> = interval.points.iter().map(|p| p.sample).collect();
    // Measured levels (set levels at the dose time are not measurements).
    let measured: Vec<Sample> =
        interval.points.iter().filter(|p| p.line.is_some()).map(|p| p.sample).collect();
    let positive: Vec<Sample> = measured.iter().copied().filter(|s| s.c > 0.0).collect();
    let peak = positive.iter().copied().reduce(|a, b| if b.c > a.c { b } else { a });
    let (first, last) = (positive.first().copied(), positive.last().copied());
    if last.is_none() {
        notes.push("no measurable level in this interval".into());
    }
    if interval.start == Start::Missing {
        notes.push("no pre-dose level at the dose time: the areas from the dose are not computed".into());
    }
    let tmax = peak.map_or(0.0, |p| p.t);
    let choice = if listed.is_some() { LambdaZChoice::Listed } else { options.lambda_z };
    let chosen = (choice, listed.unwrap_or(&[]));
    let terminal = terminal_line(&positive, tmax, interval, chosen, &mut notes, &mut explain);
    let curve = Curve { samples: &samples, rule: options.auc_rule, tmax, terminal: terminal.as_ref() };
    let from_dose = interval.start != Start::Missing;
    // Without a level at the dose time the samples start later, and no area starts at 0.
    let last_area = last.and_then(|l| curve.area(0.0, l.t));
    let (auc_last, aumc_last) = (last_area.map(|a| a.0), last_area.map(|a| a.1));
    let dose = interval.dose;
    // The areas to infinity are a single dose's: the first dose's interval.
    let to_infinity = interval.number == 1;
    let (auc_inf_obs, auc_inf_pred, aumc_inf) = match (to_infinity, last, auc_last, aumc_last, &terminal) {
        (true, Some(l), Some(a), Some(m), Some(t)) => {
            let k = t.lambda_z_per_h;
            (Some(a + l.c / k), Some(a + t.at(l.t) / k), Some(m + l.t * l.c / k + l.c / (k * k)))
        }
        _ => (None, None, None),
    };
    let auc_extrap_pct = auc_inf_obs.zip(auc_last).map(|(inf, last)| 100.0 * (inf - last) / inf);
    if let Some(p) = auc_extrap_pct.filter(|p| *p > EXTRAPOLATED_WARNING_PCT) {
        notes.push(format!(
            "warning: {:.1} % of AUC0–∞ is extrapolated past the last level (above {EXTRAPOLATED_WARNING_PCT} %)",
            p
        ));
    }
    let infusion_half = if dose.route == Route::Infusion { dose.duration_h / 2.0 } else { 0.0 };
    let mrt = ratio(aumc_inf, auc_inf_obs).map(|m| m - infusion_half);
    // The interval's area from the dose to τ.
    let auc_tau = tau.and_then(|tau| curve.area(0.0, tau)).map(|a| a.0);
    if let (Some(tau), None, true) = (tau, auc_tau, from_dose) {
        notes.push(format!(
            "no AUCτ: the levels end before τ = {} h and no terminal line carries them on",
            crate::io::output::full(tau)
        ));
    }
    let in_tau: Vec<f64> = measured
        .iter()
        .filter(|s| tau.is_some_and(|tau| s.t <= tau))
        .map(|s| s.c)
        .chain(interval.predose_mg_l)
        .collect();
    let cavg = auc_tau.zip(tau).map(|(a, tau)| a / tau);
    let cmax = peak.map(|p| p.c);
    let cmin = auc_tau.and(in_tau.iter().copied().reduce(f64::min));
    let spread = cmax.zip(cmin).map(|(hi, lo)| hi - lo);
    // Clearance: dose/AUC∞ after the first dose; dose/AUCτ after a later one (valid at steady
    // state). The volume of the terminal phase is CL/λz.
    let exposure = if to_infinity { auc_inf_obs } else { auc_tau };
    let cl = ratio(Some(dose.amount_mg), exposure).filter(|_| dose.amount_mg > 0.0 && !interval.mixed_routes);
    if interval.mixed_routes {
        notes.push("doses of different routes at the dose time: no clearance".into());
    }
    let vz = cl.zip(terminal).map(|(cl, t)| cl / t.lambda_z_per_h);
    let disposition = match dose.route {
        Route::Oral => Disposition::Oral { cl_f_l_h: cl, vz_f_l: vz },
        Route::Bolus | Route::Infusion => Disposition::Intravenous {
            cl_l_h: cl,
            vz_l: vz,
            vss_l: mrt.zip(cl).filter(|_| to_infinity).map(|(m, cl)| m * cl),
        },
    };
    let per_dose = |x: Option<f64>| x.filter(|_| dose.amount_mg > 0.0).map(|x| x / dose.amount_mg);
    let partial_aucs = options
        .partials
        .iter()
        .map(|&(from_h, to_h)| PartialAuc { from_h, to_h, auc_mg_h_l: curve.area(from_h, to_h).map(|a| a.0) })
        .collect();
    IntervalNca {
        subject,
        interval: interval.number,
        dose_time_h: dose.time_h,
        dose_mg: dose.amount_mg,
        route: dose.route,
        tau_h: tau,
        cmax_mg_l: cmax,
        tmax_h: peak.map(|p| p.t),
        clast_mg_l: last.map(|l| l.c),
        tlast_h: last.map(|l| l.t),
        tfirst_h: first.map(|f| f.t),
        auc_last_mg_h_l: auc_last,
        aumc_last_mg_h2_l: aumc_last,
        lambda_z_per_h: terminal.map(|t| t.lambda_z_per_h),
        lambda_z_r2: terminal.map(|t| t.r2),
        lambda_z_adj_r2: terminal.map(|t| t.adj_r2),
        lambda_z_points: terminal.map(|t| t.points),
        lambda_z_from_h: terminal.map(|t| t.from_h),
        lambda_z_to_h: terminal.map(|t| t.to_h),
        half_life_h: terminal.map(|t| t.half_life_h()),
        auc_inf_obs_mg_h_l: auc_inf_obs,
        auc_inf_pred_mg_h_l: auc_inf_pred,
        auc_extrap_pct,
        aumc_inf_obs_mg_h2_l: aumc_inf,
        mrt_h: mrt,
        disposition,
        auc_tau_mg_h_l: auc_tau,
        cavg_mg_l: cavg,
        cmin_mg_l: cmin,
        ctrough_mg_l: interval.predose_mg_l,
        fluctuation_pct: ratio(spread, cavg).map(|x| 100.0 * x),
        swing_pct: ratio(spread, cmin).map(|x| 100.0 * x),
        accumulation_ratio: None,
        cmax_per_dose_per_l: per_dose(cmax),
        auc_last_per_dose_h_l: per_dose(auc_last),
        auc_inf_obs_per_dose_h_l: per_dose(auc_inf_obs),
        partial_aucs,
        notes,
        explain,
        levels: measured,
        terminal,
    }
}

/// The terminal line of an interval, with a note when there is none and its choice explained.
fn terminal_line(
    positive: &[Sample],
    tmax: f64,
    interval: &Interval,
    (choice, listed): (LambdaZChoice, &[f64]),
    notes: &mut Vec<String>,
    explain: &mut Vec<String>,
) -> Option<Terminal> {
    let candidates: Vec<Sample> = match choice {
        LambdaZChoice::Automatic => {
            // After a bolus the decline starts at the peak; otherwise after it.
            let bolus = interval.dose.route == Route::Bolus;
            positive.iter().copied().filter(|s| s.t > tmax || (bolus && s.t >= tmax)).collect()
        }
        LambdaZChoice::Window(a, b) => positive.iter().copied().filter(|s| s.t >= a && s.t <= b).collect(),
        // A listed time matches a level to 1e-9 h (the same number read from two files).
        LambdaZChoice::Listed => {
            positive.iter().copied().filter(|s| listed.iter().any(|t| (t - s.t).abs() <= 1e-9)).collect()
        }
    };
    if candidates.len() < lambda_z::MIN_POINTS {
        notes.push(format!(
            "no λz: {} measurable level(s) {}, at least {} are needed",
            candidates.len(),
            match choice {
                LambdaZChoice::Automatic => "after the peak".to_string(),
                LambdaZChoice::Listed => "at the times listed".to_string(),
                LambdaZChoice::Window(a, b) =>
                    format!("in the window {}..{} h", crate::io::output::full(a), crate::io::output::full(b)),
            },
            lambda_z::MIN_POINTS
        ));
        return None;
    }
    let line = match choice {
        LambdaZChoice::Automatic => lambda_z::automatic(&candidates),
        LambdaZChoice::Window(..) | LambdaZChoice::Listed => lambda_z::line(&candidates),
    };
    match &line {
        Some(t) => explain.push(format!(
            "λz from {} levels, {}–{} h after the dose: {} 1/h, adjusted R² {}{}",
            t.points,
            crate::io::output::full(t.from_h),
            crate::io::output::full(t.to_h),
            crate::io::output::readable(t.lambda_z_per_h, 4),
            crate::io::output::readable(t.adj_r2, 6),
            match choice {
                LambdaZChoice::Automatic => " (the best adjusted R² within 1e-4, most levels)",
                LambdaZChoice::Window(..) => " (the window given)",
                LambdaZChoice::Listed => " (the times listed)",
            }
        )),
        None => notes.push("no λz: the levels do not fall on a log scale".into()),
    }
    line
}
