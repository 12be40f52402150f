//! Per-level diagnostics of a fitted model: the population prediction (PRED), the individual
//! prediction (IPRED), the individual weighted residual (IWRES), the conditional weighted
//! residual (CWRES) and the normalised prediction distribution error (NPDE), with their summary.
//! `cistern fit` (every method) and `cistern population` compute them; docs/methods.md,
//! section 12, gives the definitions and sources.

pub mod misfit;
pub mod plots;
pub mod residuals;
pub mod vpc;

use crate::fit::linalg::MAX;
use crate::fit::objective::Fixed;
use crate::fit::{FitOptions, FitResult, Intervals, Method, SubjectData};
use crate::model::PopulationModel;
use crate::population::summary::Estimation;
use crate::seeds::Seeds;
use crate::warning::{Code, Warning};
use rayon::prelude::*;
use residuals::Typical;
use serde::Serialize;

/// Simulated data sets per subject for the NPDE, unless asked otherwise.
pub const SIMULATIONS: usize = 1000;
/// An individual estimate further than this many SD (ω) from its typical value is in the tail
/// of the population distribution (two-sided p ≈ 0.003 under the model).
pub const TAIL_Z: f64 = 3.0;

/// One level with its diagnostics.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LevelDiagnostics {
    /// The subject.
    pub subject: Option<String>,
    /// Sampling time (h).
    pub time_h: f64,
    /// Time since the latest dose at or before the level (h).
    pub time_after_dose_h: f64,
    /// Measured value (mg/L); `None` below the limit.
    pub observed_mg_l: Option<f64>,
    /// Quantification limit (mg/L).
    pub lloq_mg_l: Option<f64>,
    /// Below the quantification limit.
    pub blq: bool,
    /// The typical subject's prediction with this subject's covariates (needs a model).
    pub pred_mg_l: Option<f64>,
    /// The individual prediction at the estimate.
    pub ipred_mg_l: f64,
    /// (observed − IPRED) over the residual SD at IPRED.
    pub iwres: Option<f64>,
    /// Conditional weighted residual (needs a model).
    pub cwres: Option<f64>,
    /// Normalised prediction distribution error (needs a model).
    pub npde: Option<f64>,
}

/// Count, mean and SD of one residual over the levels that have it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Moments {
    /// Levels with a value.
    pub count: usize,
    /// Mean (`None` without values).
    pub mean: Option<f64>,
    /// Standard deviation, divisor count − 1 (`None` with fewer than two values).
    pub sd: Option<f64>,
}

impl Moments {
    fn of(values: impl Iterator<Item = f64>) -> Moments {
        let v: Vec<f64> = values.collect();
        let count = v.len();
        let mean = (count > 0).then(|| v.iter().sum::<f64>() / count as f64);
        let sd = mean
            .filter(|_| count > 1)
            .map(|m| (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (count - 1) as f64).sqrt());
        Moments { count, mean, sd }
    }
}

/// The study's diagnostics: the per-level rows and their summary.
#[derive(Debug, Clone, Serialize)]
pub struct Diagnostics {
    /// Levels.
    pub levels: usize,
    /// Levels below the limit.
    pub blq: usize,
    /// Simulated data sets per subject for the NPDE.
    pub simulations: usize,
    /// IWRES over the quantified levels.
    pub iwres: Moments,
    /// CWRES over the quantified levels.
    pub cwres: Moments,
    /// NPDE over every level.
    pub npde: Moments,
    /// One row per level, in the order of the subjects and their levels (`--diagnostics-out`).
    #[serde(skip)]
    pub rows: Vec<LevelDiagnostics>,
    /// The study's warnings (misfit over the study; with a population estimation also each
    /// subject's misfit and estimates far in the tail), for the JSON's `warnings`.
    #[serde(skip)]
    pub warnings: Vec<Warning>,
}

impl Diagnostics {
    fn new(rows: Vec<LevelDiagnostics>, simulations: usize) -> Diagnostics {
        Diagnostics {
            levels: rows.len(),
            blq: rows.iter().filter(|r| r.blq).count(),
            simulations,
            iwres: Moments::of(rows.iter().filter_map(|r| r.iwres)),
            cwres: Moments::of(rows.iter().filter_map(|r| r.cwres)),
            npde: Moments::of(rows.iter().filter_map(|r| r.npde)),
            warnings: misfit::study(&rows),
            rows,
        }
    }
}

/// The population side of one subject's diagnostics: the model as the subject sees it and the
/// conditional mode θ̂.
struct Conditional {
    typical: Typical,
    mode: [f64; MAX],
}

/// One subject's rows from its individual prediction and IWRES, and (with a model) PRED,
/// CWRES and NPDE.
fn subject_rows(
    subject: &SubjectData,
    ipred: &[f64],
    iwres: &[Option<f64>],
    conditional: Option<&Conditional>,
    simulations: usize,
    seed: u64,
) -> Vec<LevelDiagnostics> {
    let levels = &subject.levels;
    let (pred, cwres, npde) = match conditional {
        Some(c) => (
            c.typical.predictions(&subject.doses, levels, &c.typical.mean).into_iter().map(Some).collect(),
            residuals::cwres(&c.typical, &subject.doses, levels, &c.mode),
            residuals::npde(&c.typical, &subject.doses, levels, simulations, seed),
        ),
        None => (vec![None; levels.len()], vec![None; levels.len()], vec![None; levels.len()]),
    };
    levels
        .iter()
        .enumerate()
        .map(|(i, l)| LevelDiagnostics {
            subject: subject.id.clone(),
            time_h: l.time_h,
            time_after_dose_h: time_after_dose(subject, l.time_h),
            observed_mg_l: l.conc_mg_l,
            lloq_mg_l: l.lloq_mg_l,
            blq: l.is_blq(),
            pred_mg_l: pred[i],
            ipred_mg_l: ipred[i],
            iwres: iwres[i],
            cwres: cwres[i],
            npde: npde[i],
        })
        .collect()
}

/// Hours since the latest dose at or before `t`.
pub(crate) fn time_after_dose(subject: &SubjectData, t: f64) -> f64 {
    let last = subject.doses.iter().map(|d| d.time_h).filter(|&d| d <= t).fold(f64::NEG_INFINITY, f64::max);
    if last.is_finite() { t - last } else { 0.0 }
}

/// The model as `subject` sees it: covariate-adjusted typical values, Ω, residual error, with
/// ka random (`n` = 3) or held at `fixed_ka`.
fn typical(model: &PopulationModel, subject: &SubjectData, fixed: Fixed) -> Option<Typical> {
    let (cl, v) = model.typical_cl_v(&subject.covariates).ok()?;
    let mut mean = [cl.ln(), v.ln(), 0.0];
    if fixed.n == 3 {
        mean[2] = model.absorption.as_ref()?.ka.typical.ln();
    }
    Some(Typical { mean, omega: model.omega(), residual: model.residual, fixed })
}

fn log_parameters(p: &crate::Params) -> [f64; MAX] {
    [p.cl_l_h.ln(), p.v_l.ln(), p.ka_per_h.unwrap_or(1.0).ln()]
}

/// Diagnostics of `fits` (each the fit of the subject at the same place in `subjects`). With a
/// model, the conditional mode is the MAP estimate (for wls and two-level fits it is found by a
/// MAP fit against the model, so that CWRES mean the same for every method).
pub fn for_fits(
    subjects: &[&SubjectData],
    fits: &mut [FitResult],
    model: Option<&PopulationModel>,
    options: &FitOptions,
    simulations: usize,
) -> Diagnostics {
    let seeds = Seeds(options.seed);
    let rows: Vec<Vec<LevelDiagnostics>> = subjects
        .par_iter()
        .zip(fits.par_iter_mut())
        .map(|(s, fit)| {
            let times: Vec<f64> = s.levels.iter().map(|l| l.time_h).collect();
            let ipred = crate::engine::concentrations(&fit.parameters, &s.doses, &times);
            // The residual SD at IPRED: the model's for map, the least-squares scale for wls.
            let quantified = s.levels.iter().filter(|l| !l.is_blq()).count();
            let n = 2 + usize::from(fit.estimates.ka_per_h.is_some());
            let sd = |l: &crate::io::levels::Level, f: f64| -> Option<f64> {
                match fit.method {
                    Method::Map => fit.residual.map(|r| r.variance(f).sqrt()),
                    Method::Wls if quantified > n => {
                        let s2 = fit.objective / (quantified - n) as f64;
                        let w = crate::fit::objective::weight(options.weighting, l.conc_mg_l?);
                        Some((s2 / w).sqrt())
                    }
                    _ => None,
                }
            };
            let iwres: Vec<Option<f64>> = s
                .levels
                .iter()
                .zip(&ipred)
                .map(|(l, &f)| {
                    let r = l.conc_mg_l? - f;
                    sd(l, f).filter(|v| *v > 0.0).map(|v| r / v)
                })
                .collect();
            let conditional = model.and_then(|m| {
                let mode = match fit.method {
                    Method::Map => log_parameters(&fit.parameters),
                    _ => {
                        let map =
                            FitOptions { method: Method::Map, intervals: Intervals::None, ..options.clone() };
                        log_parameters(&crate::fit::fit_subject(s, Some(m), &map, 0).ok()?.parameters)
                    }
                };
                let fixed = crate::fit::map_fixed(s, m, options).ok()?;
                Some(Conditional { typical: typical(m, s, fixed)?, mode })
            });
            let seed = seeds.diagnostics(s.id.as_deref());
            let rows = subject_rows(s, &ipred, &iwres, conditional.as_ref(), simulations, seed);
            fit.warnings.extend(misfit::subject(&rows));
            if fit.method == Method::Wls {
                fit.warnings.extend(weighting_dependence(s, model, options, fit));
            }
            rows
        })
        .collect();
    Diagnostics::new(rows.into_iter().flatten().collect(), simulations)
}

/// The ratio of the largest to the smallest estimate over the three weightings beyond which
/// `weighting_dependent` warns. Calibrated (docs/methods.md, section 12.4): at 1.5 it fired on
/// 9 % of six-subject studies simulated from the one-compartment model itself; at 1.75 on
/// 0.5 %, while each subject of the open indomethacin data moves 1.8- to
/// 6.4-fold.
pub const WEIGHTING_RATIO: f64 = 1.75;

/// Least squares: refit with the other weightings; warn when clearance or volume moves by more
/// than [`WEIGHTING_RATIO`] between the largest and smallest estimate, a sign that the model
/// does not describe the levels (derived here).
fn weighting_dependence(
    subject: &SubjectData,
    model: Option<&PopulationModel>,
    options: &FitOptions,
    fit: &FitResult,
) -> Option<Warning> {
    use crate::fit::objective::Weighting;
    let mut cl = vec![fit.parameters.cl_l_h];
    let mut v = vec![fit.parameters.v_l];
    for w in [Weighting::None, Weighting::InvY, Weighting::InvY2] {
        if w == options.weighting {
            continue;
        }
        let other = FitOptions { weighting: w, intervals: Intervals::None, ..options.clone() };
        let refit = crate::fit::fit_subject(subject, model, &other, 0).ok().filter(|f| f.converged)?;
        cl.push(refit.parameters.cl_l_h);
        v.push(refit.parameters.v_l);
    }
    let ratio =
        |x: &[f64]| x.iter().copied().fold(0.0, f64::max) / x.iter().copied().fold(f64::INFINITY, f64::min);
    let (rc, rv) = (ratio(&cl), ratio(&v));
    (rc > WEIGHTING_RATIO || rv > WEIGHTING_RATIO).then(|| {
        Warning::new(
            Code::WeightingDependent,
            format!(
                "the estimates depend strongly on the weighting (none, 1/y, 1/y^2): clearance moves {rc:.1}-fold \
                 and volume {rv:.1}-fold; the model may not describe these levels"
            ),
        )
    })
}

/// Diagnostics of a population estimation: IPRED at each subject's conditional mode, PRED,
/// CWRES and NPDE against the estimated model.
pub fn for_population(
    subjects: &[SubjectData],
    estimation: &Estimation,
    seed: u64,
    simulations: usize,
) -> Diagnostics {
    let seeds = Seeds(seed);
    let model = &estimation.model;
    let rows: Vec<(Vec<LevelDiagnostics>, Vec<Warning>)> = subjects
        .par_iter()
        .zip(&estimation.subjects)
        .map(|(s, e)| {
            let n = if e.ka_per_h.is_some() { 3 } else { 2 };
            let absorption = model.absorption.as_ref();
            let fixed = Fixed {
                n,
                ka_per_h: if n == 3 { None } else { absorption.map(|a| a.ka.typical) },
                f: absorption.map_or(1.0, |a| a.f),
                tlag_h: absorption.map_or(0.0, |a| a.tlag_h),
            };
            let mode = [e.cl_l_h.ln(), e.v_l.ln(), e.ka_per_h.unwrap_or(1.0).ln()];
            let individual = crate::Params {
                cl_l_h: e.cl_l_h,
                v_l: e.v_l,
                ka_per_h: e.ka_per_h.or(fixed.ka_per_h),
                f: fixed.f,
                tlag_h: fixed.tlag_h,
            };
            let times: Vec<f64> = s.levels.iter().map(|l| l.time_h).collect();
            let ipred = crate::engine::concentrations(&individual, &s.doses, &times);
            let iwres: Vec<Option<f64>> = s
                .levels
                .iter()
                .zip(&ipred)
                .map(|(l, &f)| {
                    let sd = model.residual.variance(f).sqrt();
                    let w = (l.conc_mg_l? - f) / sd;
                    w.is_finite().then_some(w)
                })
                .collect();
            let conditional = typical(model, s, fixed).map(|typical| Conditional { typical, mode });
            let name = s.id.as_deref().unwrap_or("(unnamed)");
            let mut warnings: Vec<Warning> = Vec::new();
            if let Some(c) = &conditional {
                for (i, p) in ["clearance", "volume", "ka"].iter().enumerate().take(fixed.n) {
                    let z = (mode[i] - c.typical.mean[i]) / c.typical.omega[i][i].sqrt();
                    if z.abs() > TAIL_Z {
                        warnings.push(Warning::new(
                            Code::FarFromTypical,
                            format!("subject {name}: the {p} estimate is {z:.1} SD from the population typical value"),
                        ));
                    }
                }
            }
            let seed = seeds.diagnostics(s.id.as_deref());
            let rows = subject_rows(s, &ipred, &iwres, conditional.as_ref(), simulations, seed);
            warnings.extend(
                misfit::subject(&rows).map(|w| Warning { message: format!("subject {name}: {}", w.message), ..w }),
            );
            (rows, warnings)
        })
        .collect();
    let subject_warnings: Vec<Warning> = rows.iter().flat_map(|r| r.1.iter().cloned()).collect();
    let mut d = Diagnostics::new(rows.into_iter().flat_map(|r| r.0).collect(), simulations);
    d.warnings.extend(subject_warnings);
    d
}
