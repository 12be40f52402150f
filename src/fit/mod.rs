//! Estimating a subject's clearance and volume (and ka for oral drugs) from sampled levels.
//!
//! Methods: `map` (Bayesian, against a population prior, with the M3 likelihood for levels
//! below the quantification limit), `wls` (weighted least squares, no prior) and `two-level`
//! (the classic steady-state intermittent-infusion method). Intervals: `posterior` (adaptive
//! importance sampling of the exact posterior), `laplace` (the Hessian at the mode) or `none`.
//! Subjects are fitted in parallel and deterministically: each has its own seed.

// Index loops read as the matrix formulas they implement.
#![allow(clippy::needless_range_loop)]

pub(crate) mod linalg;
pub mod objective;
pub(crate) mod optimise;
pub(crate) mod posterior;
pub mod two_level;

use crate::choice::choice_enum;
use crate::covariates::Covariates;
use crate::dosing::{Dose, Route};
use crate::engine::Params;
use crate::error::Error;
use crate::io::levels::Level;
use crate::model::{PopulationModel, Residual};
use crate::seeds::Seeds;
use crate::warning::{Code, Warning};
use linalg::{MAX, Mat, spd_inverse};
use objective::{Likelihood, Prior, Problem, Weighting};
use rayon::prelude::*;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, StudentsT};

choice_enum! {
    /// Estimation method.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
    #[serde(rename_all = "kebab-case")]
    pub enum Method: "method" {
        /// Maximum a posteriori against the population model.
        Map = "map",
        /// Weighted least squares, no prior.
        Wls = "wls",
        /// Two post-infusion levels in one interval at steady state.
        TwoLevel = "two-level",
    }
}

choice_enum! {
    /// How uncertainty is reported.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
    #[serde(rename_all = "kebab-case")]
    pub enum Intervals: "interval type" {
        /// From draws of the actual posterior (map) — calibrated.
        Posterior = "posterior",
        /// From the curvature at the optimum (fast; under-covers in sparse designs).
        Laplace = "laplace",
        /// Point estimates only.
        None = "none",
        ;
        /// From the least-squares curvature and residual variance (what wls reports; not a choice).
        LeastSquares = "least-squares",
    }
}

/// Options shared by all subjects of one run.
#[derive(Debug, Clone)]
pub struct FitOptions {
    /// Estimation method.
    pub method: Method,
    /// Interval type.
    pub intervals: Intervals,
    /// Importance-sampling draws per subject.
    pub draws: usize,
    /// Seed of all random draws.
    pub seed: u64,
    /// Least-squares weighting.
    pub weighting: Weighting,
    /// ka held fixed (1/h), from the command line.
    pub ka_per_h: Option<f64>,
    /// Bioavailability and lag time when no model gives them.
    pub f: f64,
    /// Lag time (h) when no model gives it.
    pub tlag_h: f64,
    /// Unweighted posterior draws to keep per subject (for planning); 0 keeps none.
    pub keep_draws: usize,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            method: Method::Map,
            intervals: Intervals::Posterior,
            draws: 2000,
            seed: 1,
            weighting: Weighting::None,
            ka_per_h: None,
            f: 1.0,
            tlag_h: 0.0,
            keep_draws: 0,
        }
    }
}

/// One subject's data.
#[derive(Debug, Clone)]
pub struct SubjectData {
    /// Identifier (`None` for a single unnamed subject).
    pub id: Option<String>,
    /// Dose history, sorted by time.
    pub doses: Vec<Dose>,
    /// Levels, sorted by time.
    pub levels: Vec<Level>,
    /// Covariates (with derived ones filled in).
    pub covariates: Covariates,
}

impl SubjectData {
    /// The time of the first dose, if any.
    pub fn first_dose_h(&self) -> Option<f64> {
        self.doses.iter().map(|d| d.time_h).reduce(f64::min)
    }

    /// Levels drawn before the first dose: the model cannot explain them (one check, used by the
    /// fitter and by the study loader, which names the file and line).
    pub fn levels_before_first_dose(&self) -> impl Iterator<Item = &Level> {
        let first = self.first_dose_h().unwrap_or(f64::INFINITY);
        self.levels.iter().filter(move |l| l.time_h < first)
    }
}

/// An estimate with its uncertainty.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Estimate {
    /// Point estimate (the posterior mode for map).
    pub value: f64,
    /// Standard error (posterior standard deviation for map with posterior intervals).
    pub se: Option<f64>,
    /// 95 % interval.
    pub ci95: Option<[f64; 2]>,
}

/// The estimated parameters.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Estimates {
    /// Clearance (L/h).
    pub cl_l_h: Estimate,
    /// Volume (L).
    pub v_l: Estimate,
    /// Elimination rate constant (1/h).
    pub k_per_h: Estimate,
    /// Half-life (h).
    pub half_life_h: Estimate,
    /// Absorption rate constant (1/h), when estimated.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ka_per_h: Option<Estimate>,
}

/// One level with its fit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LevelFit {
    /// Sampling time (h).
    pub time_h: f64,
    /// Measured value (mg/L); `None` below the limit.
    pub observed_mg_l: Option<f64>,
    /// Quantification limit (mg/L).
    pub lloq_mg_l: Option<f64>,
    /// Below the quantification limit.
    pub blq: bool,
    /// Individual prediction (mg/L).
    pub predicted_mg_l: f64,
    /// Observed − predicted (mg/L).
    pub residual_mg_l: Option<f64>,
    /// Residual over its standard deviation (map) or times √weight (wls).
    pub weighted_residual: Option<f64>,
}

/// The population typical values for this subject (covariate-adjusted).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PriorSummary {
    /// Typical clearance (L/h).
    pub cl_l_h: f64,
    /// Typical volume (L).
    pub v_l: f64,
    /// Typical ka (1/h).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ka_per_h: Option<f64>,
}

/// The fit of one subject.
#[derive(Debug, Clone, Serialize)]
pub struct FitResult {
    /// Subject identifier.
    pub subject: Option<String>,
    /// Method used.
    pub method: Method,
    /// Interval type used.
    pub intervals: Intervals,
    /// Whether the optimiser converged (gradient ≈ 0, positive-definite Hessian).
    pub converged: bool,
    /// Optimiser iterations.
    pub iterations: u64,
    /// Objective at the optimum (−2 log posterior up to a constant for map; weighted SSR for wls).
    pub objective: f64,
    /// The estimates.
    pub estimates: Estimates,
    /// How covariates the model needs were derived (e.g. creatinine clearance by
    /// Cockcroft–Gault with total body weight).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub derived_covariates: Vec<String>,
    /// Typical values of the prior (map).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub prior: Option<PriorSummary>,
    /// Effective sample size of the posterior draws.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub effective_draws: Option<f64>,
    /// The two-level method's extrapolated peak and trough.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub two_level: Option<two_level::TwoLevel>,
    /// Each level with its prediction and residuals.
    pub levels: Vec<LevelFit>,
    /// Things the user should know, each with its stable code.
    pub warnings: Vec<Warning>,
    /// The point estimate as a full parameter set (with the fixed ka, F and lag), for
    /// continuing predictions.
    pub parameters: Params,
    /// The residual error model the fit used (map), for planning further levels.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub residual: Option<Residual>,
    /// Unweighted posterior draws of the individual parameters (when asked for).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub draws: Vec<Params>,
}

impl FitResult {
    /// The estimates with their names, units and the population's typical value where the prior
    /// has one, in reading order (ka only when estimated).
    pub fn named_estimates(&self) -> Vec<(&'static str, &'static str, &Estimate, Option<f64>)> {
        let e = &self.estimates;
        let prior = self.prior;
        let mut rows = vec![
            ("clearance", "L/h", &e.cl_l_h, prior.map(|p| p.cl_l_h)),
            ("volume", "L", &e.v_l, prior.map(|p| p.v_l)),
            // The typical k and half-life are those of the typical clearance and volume.
            ("k", "1/h", &e.k_per_h, prior.map(|p| p.cl_l_h / p.v_l)),
            ("half-life", "h", &e.half_life_h, prior.map(|p| std::f64::consts::LN_2 * p.v_l / p.cl_l_h)),
        ];
        if let Some(ka) = &e.ka_per_h {
            rows.push(("ka", "1/h", ka, prior.and_then(|p| p.ka_per_h)));
        }
        rows
    }
}

/// Fit every subject in parallel; results are in input order and independent of thread count.
/// Each subject draws from its own stream, keyed by its identifier ([`Seeds::subject`]).
pub fn fit_all(
    subjects: &[SubjectData],
    model: Option<&PopulationModel>,
    options: &FitOptions,
) -> Vec<Result<FitResult, Error>> {
    fit_all_reporting(subjects, model, options, &|| ())
}

/// [`fit_all`], calling `done` as each subject's fit ends (from any thread), so that a caller
/// can show progress on a long study.
pub fn fit_all_reporting(
    subjects: &[SubjectData],
    model: Option<&PopulationModel>,
    options: &FitOptions,
    done: &(dyn Fn() + Sync),
) -> Vec<Result<FitResult, Error>> {
    let seeds = Seeds(options.seed);
    subjects
        .par_iter()
        .map(|s| {
            let fit = fit_subject(s, model, options, seeds.subject(s.id.as_deref()));
            done();
            fit
        })
        .collect()
}

/// How ka, F and the lag time are handled for one subject.
struct Absorption {
    estimate_ka: bool,
    fixed_ka: Option<f64>,
    f: f64,
    tlag_h: f64,
}

impl Absorption {
    fn fixed(&self, n: usize) -> objective::Fixed {
        objective::Fixed { n, ka_per_h: self.fixed_ka, f: self.f, tlag_h: self.tlag_h }
    }
}

fn absorption(
    subject: &SubjectData,
    model: Option<&PopulationModel>,
    options: &FitOptions,
) -> Result<Absorption, String> {
    let oral = subject.doses.iter().any(|d| d.route == Route::Oral);
    let model_abs = model.and_then(|m| m.absorption.as_ref());
    let (f, tlag_h) = model_abs.map_or((options.f, options.tlag_h), |a| (a.f, a.tlag_h));
    let fixed_ka = match (options.ka_per_h, model_abs) {
        (Some(ka), _) => Some(ka),
        (None, Some(a)) if !a.ka.varies() || options.method == Method::Wls && !oral => Some(a.ka.typical),
        _ => None,
    };
    let estimate_ka = oral && fixed_ka.is_none();
    if estimate_ka && options.method == Method::Map && model_abs.is_none() {
        return Err(
            "oral doses: the model has no [absorption] table to give ka a prior; add one, or hold ka fixed"
                .into(),
        );
    }
    Ok(Absorption { estimate_ka, fixed_ka: fixed_ka.or(model_abs.map(|a| a.ka.typical)), f, tlag_h })
}

/// What a MAP fit of `subject` against `model` estimates (n) and holds (ka, F, lag): the view
/// of the model the diagnostics use for every method.
pub(crate) fn map_fixed(
    subject: &SubjectData,
    model: &PopulationModel,
    options: &FitOptions,
) -> Result<objective::Fixed, String> {
    let map = FitOptions { method: Method::Map, ..options.clone() };
    let abs = absorption(subject, Some(model), &map)?;
    Ok(abs.fixed(if abs.estimate_ka { 3 } else { 2 }))
}

/// Fit one subject with its own `seed`. A subject whose data or options cannot be fitted as
/// asked is an [`Error::Usage`] naming what is wrong.
///
/// A least-squares fit of levels without a population model:
///
/// ```
/// use cistern::engine::{Params, concentrations};
/// use cistern::fit::{FitOptions, Method, SubjectData, fit_subject};
/// use cistern::io::levels::Level;
/// use cistern::{Covariates, Dose, Route};
///
/// let truth = Params::iv(4.0, 40.0);
/// let doses = vec![Dose { time_h: 0.0, amount_mg: 1000.0, route: Route::Infusion, duration_h: 1.0 }];
/// let times = [2.0, 6.0, 12.0];
/// let levels = (times.iter().zip(concentrations(&truth, &doses, &times)))
///     .map(|(&time_h, c)| Level { time_h, conc_mg_l: Some(c), lloq_mg_l: None, line: 0 })
///     .collect();
/// let subject = SubjectData { id: None, doses, levels, covariates: Covariates::default() };
/// let options = FitOptions { method: Method::Wls, ..FitOptions::default() };
/// let fit = fit_subject(&subject, None, &options, 1)?;
/// assert!((fit.parameters.cl_l_h - 4.0).abs() < 1e-3 && (fit.parameters.v_l - 40.0).abs() < 1e-2);
/// # Ok::<(), cistern::Error>(())
/// ```
pub fn fit_subject(
    subject: &SubjectData,
    model: Option<&PopulationModel>,
    options: &FitOptions,
    seed: u64,
) -> Result<FitResult, Error> {
    let abs = absorption(subject, model, options).map_err(Error::Usage)?;
    match options.method {
        Method::TwoLevel => fit_two_level(subject, &abs),
        Method::Map => match model {
            Some(model) => fit_map(subject, model, options, &abs, seed),
            None => Err("the map method needs a population model".into()),
        },
        Method::Wls => fit_wls(subject, model, options, &abs),
    }
    .map_err(Error::Usage)
}

fn base_params(abs: &Absorption, theta: &[f64]) -> Params {
    Params {
        cl_l_h: theta[0].exp(),
        v_l: theta[1].exp(),
        ka_per_h: if abs.estimate_ka { Some(theta[2].exp()) } else { abs.fixed_ka },
        f: abs.f,
        tlag_h: abs.tlag_h,
    }
}

/// Point estimates and intervals from a covariance of θ (log-normal intervals, `z` quantile).
fn from_covariance(theta: &[f64], cov: Option<&Mat>, n: usize, z: f64) -> Estimates {
    let est = |log_value: f64, var: Option<f64>| {
        let value = log_value.exp();
        match var.filter(|v| v.is_finite() && *v >= 0.0) {
            Some(v) => {
                let sd = v.sqrt();
                Estimate {
                    value,
                    se: Some(value * sd),
                    ci95: Some([(log_value - z * sd).exp(), (log_value + z * sd).exp()]),
                }
            }
            None => Estimate { value, se: None, ci95: None },
        }
    };
    let c = |i: usize, j: usize| cov.map(|m| m[i][j]);
    let ln_k = theta[0] - theta[1];
    let var_k = cov.map(|m| m[0][0] + m[1][1] - 2.0 * m[0][1]);
    Estimates {
        cl_l_h: est(theta[0], c(0, 0)),
        v_l: est(theta[1], c(1, 1)),
        k_per_h: est(ln_k, var_k),
        half_life_h: est(std::f64::consts::LN_2.ln() - ln_k, var_k),
        ka_per_h: (n == 3).then(|| est(theta[2], c(2, 2))),
    }
}

/// Estimates from weighted posterior draws: mode as value, posterior SD and 2.5–97.5 % quantiles.
/// Every reported quantity is monotone in ln CL, ln V, ln k = ln CL − ln V or ln ka, so the
/// draws are sorted once per key and each interval is read off that order.
fn from_draws(theta: &[f64], draws: &posterior::WeightedDraws, n: usize) -> Estimates {
    let est = |value: f64, values: &[f64]| Estimate {
        value,
        se: Some(draws.mean_sd_of(values).1),
        ci95: Some(draws.interval(values, 0.025, 0.975)),
    };
    // CL, V and ka are the e^θ the sampler's objective computed.
    let parameter = |i: usize| -> Vec<f64> { draws.parameters.iter().map(|p| p[i]).collect() };
    let ln2 = std::f64::consts::LN_2;
    // k's values as CL/V from the draws' own CL and V (no exponential per draw), the
    // half-life's as ln 2 / k.
    let k: Vec<f64> = draws.parameters.iter().map(|p| p[0] / p[1]).collect();
    let half_life: Vec<f64> = k.iter().map(|k| ln2 / k).collect();
    Estimates {
        cl_l_h: est(theta[0].exp(), &parameter(0)),
        v_l: est(theta[1].exp(), &parameter(1)),
        k_per_h: est((theta[0] - theta[1]).exp(), &k),
        half_life_h: est(ln2 / (theta[0] - theta[1]).exp(), &half_life),
        ka_per_h: (n == 3).then(|| est(theta[2].exp(), &parameter(2))),
    }
}

fn level_fits(
    problem: &Problem,
    theta: &[f64],
    weight_of: impl Fn(&Level, f64) -> Option<f64>,
) -> Vec<LevelFit> {
    let predicted = problem.predictions(theta);
    problem
        .levels()
        .iter()
        .zip(predicted)
        .map(|(l, f)| {
            let residual = l.conc_mg_l.map(|y| y - f);
            LevelFit {
                time_h: l.time_h,
                observed_mg_l: l.conc_mg_l,
                lloq_mg_l: l.lloq_mg_l,
                blq: l.is_blq(),
                predicted_mg_l: f,
                residual_mg_l: residual,
                weighted_residual: residual.and_then(|r| weight_of(l, f).map(|w| r * w)),
            }
        })
        .collect()
}

fn plausibility(model: Option<&PopulationModel>, e: &Estimates, warnings: &mut Vec<Warning>) {
    let Some(m) = model else { return };
    let ka = e.ka_per_h.zip(m.absorption.as_ref().and_then(|a| a.ka.plausible));
    let checks = [
        ("clearance", e.cl_l_h.value, m.clearance.plausible, "L/h"),
        ("volume", e.v_l.value, m.volume.plausible, "L"),
        ("ka", ka.map_or(f64::NAN, |(k, _)| k.value), ka.map(|(_, r)| r), "1/h"),
    ];
    for (name, value, range, unit) in checks {
        if let Some((lo, hi)) = range
            && !(lo..=hi).contains(&value)
        {
            warnings.push(Warning::new(
                Code::ImplausibleEstimate,
                format!("the {name} estimate {value:.4} {unit} is outside the model's plausible range {lo}–{hi} {unit}"),
            ));
        }
    }
}

/// A subject the fitters can use: doses, levels, none before the first dose.
pub(crate) fn check_levels(subject: &SubjectData) -> Result<(), String> {
    let first = subject.first_dose_h().ok_or("the subject has no doses")?;
    if let Some(l) = subject.levels_before_first_dose().next() {
        return Err(format!(
            "a level at {} h (line {}) comes before the first dose at {first} h",
            l.time_h, l.line
        ));
    }
    if subject.levels.is_empty() {
        return Err("the subject has no levels".into());
    }
    Ok(())
}

/// With a proportional-only residual error (no additive part) a level predicted exactly 0 has
/// zero variance: its distribution is a point mass at 0. Where no drug has reached the body
/// yet (the start of the first infusion, or an oral lag) the prediction is 0 for every
/// parameter value, so a measured level above 0 there is one the model declares impossible: a
/// modelling error, refused here with the level's line (docs/methods.md, "Zero variance").
fn check_point_masses(subject: &SubjectData, residual: &Residual, tlag_h: f64) -> Result<(), String> {
    if residual.additive_mg_l > 0.0 {
        return Ok(());
    }
    // A bolus counts at its own instant; an infusion or an absorbed dose only after it starts.
    let reached = |t: f64| {
        subject.doses.iter().filter(|d| d.amount_mg > 0.0).any(|d| match d.route {
            Route::Bolus => d.time_h <= t,
            Route::Infusion => d.time_h < t,
            Route::Oral => d.time_h + tlag_h < t,
        })
    };
    match subject.levels.iter().find(|l| l.conc_mg_l.is_some_and(|y| y > 0.0) && !reached(l.time_h)) {
        Some(l) => Err(format!(
            "the level at {} h (line {}) is {} mg/L, but no drug has reached the body by then: with a \
             proportional-only residual error (additive_mg_l = 0) its predicted value 0 has no spread, \
             so the model cannot explain it; give the model an additive error or leave the level out",
            crate::limits::number(l.time_h),
            l.line,
            crate::limits::number(l.conc_mg_l.unwrap_or_default()),
        )),
        None => Ok(()),
    }
}

fn convergence_warnings(opt: &optimise::Optimum, others: optimise::Others, warnings: &mut Vec<Warning>) {
    if !opt.converged {
        warnings.push(Warning::new(
            Code::NotConverged,
            format!(
                "the optimiser did not converge ({}; largest gradient component {:.2e})",
                opt.reason, opt.gradient_norm
            ),
        ));
    }
    match others {
        optimise::Others::None => {}
        optimise::Others::WorseOptimum => warnings.push(Warning::new(
            Code::WorseOptimum,
            "another start found a different, worse local optimum; the best is reported",
        )),
        optimise::Others::EqualOptimum => warnings.push(Warning::new(
            Code::EqualOptimum,
            "another, different set of parameters fits equally well: the levels cannot tell them apart",
        )),
    }
}

/// With ka estimated, the exchange of absorption and elimination rates (flip-flop: k ↔ ka with
/// V·k/ka for V, CL unchanged) can fit as well. Among equally good optima the one with ka > k
/// is reported (common practice, no source), with a warning; a clearly better one always wins.
fn prefer_absorption_faster(
    problem: &Problem,
    opt: optimise::Optimum,
    others: optimise::Others,
    warnings: &mut Vec<Warning>,
) -> (optimise::Optimum, optimise::Others) {
    if problem.n != 3 {
        return (opt, others);
    }
    let t = &opt.theta;
    let (ln_k, ln_ka) = (t[0] - t[1], t[2]);
    let mirror = [t[0], t[1] + ln_k - ln_ka, ln_k];
    let other = optimise::minimise(problem, &mirror);
    let same_fit = other.converged && (other.cost - opt.cost).abs() <= 1e-6 * opt.cost.abs().max(1.0);
    let distinct = (other.theta[2] - t[2]).abs() > 1e-3;
    if !(same_fit && distinct) {
        return (opt, others);
    }
    warnings.push(Warning::new(
        Code::FlipFlop,
        "absorption and elimination rates can be exchanged with the same fit (flip-flop); the solution \
         with ka > k is reported",
    ));
    let faster = |o: &optimise::Optimum| o.theta[2] > o.theta[0] - o.theta[1];
    let chosen = if faster(&opt) {
        opt
    } else if faster(&other) {
        other
    } else {
        opt
    };
    // The ambiguity is reported above; it is not another optimum to warn about again.
    let others = if others == optimise::Others::EqualOptimum { optimise::Others::None } else { others };
    (chosen, others)
}

fn fit_map(
    subject: &SubjectData,
    model: &PopulationModel,
    options: &FitOptions,
    abs: &Absorption,
    seed: u64,
) -> Result<FitResult, String> {
    check_levels(subject)?;
    check_point_masses(subject, &model.residual, abs.tlag_h)?;
    let cov = &subject.covariates;
    let (cl_typ, v_typ) = model.typical_cl_v(cov).map_err(|e| e.describe())?;
    let ka_prior = model.absorption.as_ref().map(|a| a.ka.clone());
    let n = if abs.estimate_ka { 3 } else { 2 };
    // With ka not estimated its random effect (if any) is integrated out: the top-left 2×2 of
    // Ω is the marginal covariance of η_CL and η_V.
    let omega = model.omega();
    let mut mean = [cl_typ.ln(), v_typ.ln(), 0.0];
    if n == 3 {
        let ka = ka_prior.as_ref().ok_or("the model has no [absorption] table")?;
        mean[2] = ka.typical.ln();
    }
    let precision = spd_inverse(&omega, n)
        .ok_or("the model's variances and correlation do not form a valid covariance")?;
    let problem = Problem::new(
        &subject.doses,
        &subject.levels,
        abs.fixed(n),
        Likelihood::Bayes(model.residual),
        Some(Prior { mean, precision }),
    );
    let sd: Vec<f64> = (0..n).map(|i| omega[i][i].sqrt()).collect();
    let mut warnings = Vec::new();
    // Start at the prior mean. With ka estimated the posterior can have a second, flip-flop
    // mode (absorption and elimination rates exchanged), so start there too; shifted starts
    // are the fallback when nothing converges.
    let mut starts = vec![mean];
    if n == 3 {
        let (k, ka) = (mean[0] - mean[1], mean[2]);
        starts.push([ka + mean[1], mean[1], k]);
    }
    let fallback: Vec<[f64; MAX]> = [1.0, -1.0]
        .iter()
        .map(|sign| {
            let mut s = mean;
            s[0] += sign * 0.5 * sd[0];
            s[1] -= sign * 0.5 * sd[1];
            s
        })
        .collect();
    let (opt, other) = optimise::minimise_from(&problem, &starts, &fallback);
    let (opt, other) = prefer_absorption_faster(&problem, opt, other, &mut warnings);
    let theta = opt.theta.clone();
    convergence_warnings(&opt, other, &mut warnings);
    let laplace = spd_inverse(&opt.hessian, n).map(|mut c| {
        for row in c.iter_mut() {
            for x in row.iter_mut() {
                *x *= 2.0;
            }
        }
        c
    });
    let mut effective_draws = None;
    let mut kept = Vec::new();
    // The least-squares label has no meaning for map: its curvature interval is Laplace's.
    let intervals = match options.intervals {
        Intervals::LeastSquares => Intervals::Laplace,
        other => other,
    };
    let estimates = match options.intervals {
        Intervals::None => from_covariance(&theta, None, n, 0.0),
        Intervals::Laplace | Intervals::LeastSquares => {
            from_covariance(&theta, laplace.as_ref(), n, 1.959963984540054)
        }
        Intervals::Posterior => {
            match posterior::sample(&problem, &theta, &opt.hessian, options.draws, seed) {
                Some(draws) => {
                    effective_draws = Some(draws.ess);
                    if draws.ess < 0.1 * options.draws as f64 {
                        warnings.push(Warning::new(
                            Code::FewEffectiveDraws,
                            format!(
                                "only {:.0} effective posterior draws of {}; intervals are rough (raise --draws)",
                                draws.ess, options.draws
                            ),
                        ));
                    }
                    if options.keep_draws > 0 {
                        let u0 = (Seeds::resample_offset(seed) >> 11) as f64 / (1u64 << 53) as f64;
                        kept = draws
                            .resample(options.keep_draws, u0)
                            .iter()
                            .map(|t| base_params(abs, &t[..]))
                            .collect();
                    }
                    from_draws(&theta, &draws, n)
                }
                None => {
                    warnings.push(Warning::new(
                        Code::NoPosterior,
                        "the posterior could not be sampled (curvature not positive definite); no intervals",
                    ));
                    from_covariance(&theta, None, n, 0.0)
                }
            }
        }
    };
    // The prior's pull and the data's information.
    let names = ["clearance", "volume", "ka"];
    for i in 0..n {
        let z = (theta[i] - mean[i]) / sd[i];
        if z.abs() > 3.0 {
            warnings.push(Warning::new(
                Code::FarFromTypical,
                format!("the {} estimate is {z:.1} SD from the population typical value", names[i]),
            ));
        }
    }
    if let Some(c) = &laplace
        && c[1][1].sqrt() > 0.9 * sd[1]
    {
        warnings.push(Warning::new(
            Code::LittleInformation,
            "the levels carry little information on volume: its estimate stays close to the prior",
        ));
    }
    let residual = model.residual;
    let levels = level_fits(&problem, &theta, |_, f| Some(1.0 / residual.variance(f).sqrt()));
    for l in &levels {
        if l.weighted_residual.is_some_and(|w| w.abs() > 4.0) {
            warnings.push(Warning::new(
                Code::Outlier,
                format!(
                    "the level at {} h is {:.1} SD from its prediction: check it (outlier?)",
                    l.time_h,
                    l.weighted_residual.unwrap_or(0.0)
                ),
            ));
        }
    }
    plausibility(Some(model), &estimates, &mut warnings);
    Ok(FitResult {
        subject: subject.id.clone(),
        method: Method::Map,
        intervals,
        converged: opt.converged,
        iterations: opt.iterations,
        objective: opt.cost,
        estimates,
        derived_covariates: subject.covariates.derivations.clone(),
        prior: Some(PriorSummary { cl_l_h: cl_typ, v_l: v_typ, ka_per_h: ka_prior.map(|k| k.typical) }),
        effective_draws,
        two_level: None,
        levels,
        warnings,
        draws: kept,
        parameters: base_params(abs, &theta),
        residual: Some(model.residual),
    })
}

fn fit_wls(
    subject: &SubjectData,
    model: Option<&PopulationModel>,
    options: &FitOptions,
    abs: &Absorption,
) -> Result<FitResult, String> {
    check_levels(subject)?;
    let n = if abs.estimate_ka { 3 } else { 2 };
    let problem = Problem::new(
        &subject.doses,
        &subject.levels,
        abs.fixed(n),
        Likelihood::LeastSquares(options.weighting),
        None,
    );
    let m = problem.levels().len();
    let mut warnings = Vec::new();
    if m < n {
        return Err(format!(
            "weighted least squares needs at least {n} quantified levels to estimate {n} parameters, found {m}"
        ));
    }
    if problem.levels().iter().any(|l| l.conc_mg_l.is_some_and(|y| y <= 0.0))
        && options.weighting != Weighting::None
    {
        return Err("1/y weighting needs every level above zero".into());
    }
    if m < subject.levels.len() {
        warnings.push(Warning::new(
            Code::BlqLeftOut,
            "levels below the quantification limit are left out of least squares",
        ));
    }
    // Coarse log-grid for starting points: no prior to start from.
    let mut grid = Vec::new();
    let ka_grid: &[f64] = if n == 3 { &[0.1, 0.3, 1.0, 3.0, 10.0] } else { &[1.0] };
    for i in 0..25 {
        for j in 0..25 {
            for &ka in ka_grid {
                let t = [
                    (-3.0 + 6.0 * i as f64 / 24.0) * std::f64::consts::LN_10,
                    (-1.0 + 5.0 * j as f64 / 24.0) * std::f64::consts::LN_10,
                    ka.ln(),
                ];
                let c = problem.cost(&t[..n]);
                if c.is_finite() {
                    grid.push((c, t));
                }
            }
        }
    }
    grid.sort_by(|a, b| a.0.total_cmp(&b.0));
    // The best grid points at least one unit of ln apart, so the starts explore separate basins.
    let mut starts: Vec<[f64; MAX]> = Vec::new();
    for (_, t) in &grid {
        if starts.len() == 3 {
            break;
        }
        if starts.iter().all(|s| (0..n).map(|i| (s[i] - t[i]).abs()).fold(0.0, f64::max) >= 1.0) {
            starts.push(*t);
        }
    }
    if starts.is_empty() {
        return Err("no starting point gives finite predictions".into());
    }
    let (opt, other) = optimise::minimise_from(&problem, &starts, &[]);
    let (opt, other) = prefer_absorption_faster(&problem, opt, other, &mut warnings);
    convergence_warnings(&opt, other, &mut warnings);
    let theta = opt.theta.clone();
    // Jacobian of the predictions with respect to θ, for standard errors and identifiability.
    let duals: Vec<objective::D3> = (0..n).map(|i| objective::D3::var(theta[i], i)).collect();
    let f = problem.predictions(&duals);
    let mut jtwj: Mat = [[0.0; MAX]; MAX];
    for (l, fi) in problem.levels().iter().zip(&f) {
        let w = objective::weight(options.weighting, l.conc_mg_l.unwrap_or(0.0));
        for a in 0..n {
            for b in 0..n {
                jtwj[a][b] += w * fi.d[a] * fi.d[b];
            }
        }
    }
    let information = spd_inverse(&jtwj, n);
    let diag_ratio = {
        let d: Vec<f64> = (0..n).map(|i| jtwj[i][i]).collect();
        let det = linalg::cholesky(&jtwj, n).map(|l| linalg::log_det(&l, n).exp()).unwrap_or(0.0);
        det / d.iter().product::<f64>()
    };
    if information.is_none() || diag_ratio < 1e-8 {
        warnings.push(Warning::new(
            Code::NotIdentifiable,
            "the design cannot identify both clearance and volume: the levels fit many combinations equally well",
        ));
    }
    let (cl, v) = (theta[0].exp(), theta[1].exp());
    if !(1e-4..=1e4).contains(&cl) || !(1e-3..=1e6).contains(&v) {
        warnings.push(Warning::new(
            Code::RanOff,
            format!(
                "the estimates ran off to implausible values (CL {cl:.3e} L/h, V {v:.3e} L): \
                 the levels do not follow a one-compartment course for this dose history"
            ),
        ));
    }
    let dof = m - n;
    let estimates = if dof == 0 {
        warnings.push(Warning::new(
            Code::NoStandardErrors,
            "as many levels as parameters: the curve passes through the levels and no standard errors can be given",
        ));
        from_covariance(&theta, None, n, 0.0)
    } else if options.intervals == Intervals::None {
        from_covariance(&theta, None, n, 0.0)
    } else {
        let s2 = opt.cost / dof as f64;
        let cov = information.map(|mut c| {
            for row in c.iter_mut() {
                for x in row.iter_mut() {
                    *x *= s2;
                }
            }
            c
        });
        let t =
            StudentsT::new(0.0, 1.0, dof as f64).map(|d| d.inverse_cdf(0.975)).unwrap_or(1.959963984540054);
        from_covariance(&theta, cov.as_ref(), n, t)
    };
    let weighting = options.weighting;
    let levels =
        level_fits(&problem, &theta, |l, _| l.conc_mg_l.map(|y| objective::weight(weighting, y).sqrt()));
    plausibility(model, &estimates, &mut warnings);
    Ok(FitResult {
        subject: subject.id.clone(),
        method: Method::Wls,
        intervals: if dof == 0 || options.intervals == Intervals::None {
            Intervals::None
        } else {
            Intervals::LeastSquares
        },
        converged: opt.converged,
        iterations: opt.iterations,
        objective: opt.cost,
        estimates,
        derived_covariates: subject.covariates.derivations.clone(),
        prior: None,
        effective_draws: None,
        two_level: None,
        levels,
        warnings,
        draws: Vec::new(),
        parameters: base_params(abs, &theta),
        residual: None,
    })
}

fn fit_two_level(subject: &SubjectData, abs: &Absorption) -> Result<FitResult, String> {
    check_levels(subject)?;
    let (tl, warnings) = two_level::from_history(&subject.doses, &subject.levels)?;
    let theta = [tl.cl_l_h.ln(), tl.v_l.ln()];
    let problem = Problem::new(
        &subject.doses,
        &subject.levels,
        abs.fixed(2),
        Likelihood::LeastSquares(Weighting::None),
        None,
    );
    let levels = level_fits(&problem, &theta, |_, _| None);
    Ok(FitResult {
        subject: subject.id.clone(),
        method: Method::TwoLevel,
        intervals: Intervals::None,
        converged: true,
        iterations: 0,
        objective: problem.cost(&theta),
        estimates: from_covariance(&theta, None, 2, 0.0),
        derived_covariates: subject.covariates.derivations.clone(),
        prior: None,
        effective_draws: None,
        two_level: Some(tl),
        levels,
        warnings,
        draws: Vec::new(),
        parameters: base_params(abs, &theta),
        residual: None,
    })
}
