//! The subject a plan is for: a dose history and the posterior to plan over, from a fit made
//! on the spot or from a fit saved with its draws.

use super::study::pick;
use crate::dosing::Dose;
use crate::engine::Params;
use crate::error::{Error, InputError, Origin, Result};
use crate::fit::{FitOptions, FitResult, Intervals, Method, SubjectData, fit_subject};
use crate::io::doses::parse_doses;
use crate::io::input;
use crate::io::table::Table;
use crate::model::{PopulationModel, Residual};
use crate::plan::session::{
    DEFAULT_SAMPLE_AFTER_H, Exposure, Outcome, Posterior, Record, Settings, plan_subject,
};
use crate::seeds::Seeds;
use crate::spec::{Fallback, Grid, Needs, Resolved, Setting, Spec, Stated};
use crate::sweep::population::{CovariateSource, Population};
use serde::Deserialize;
use std::path::PathBuf;

/// The fit planning starts from: MAP against the model, with `draws` equal-weight posterior
/// draws kept. `plan` and `report` both start here, so both plan from the same posterior; the
/// subject's stream is the one `cistern fit` uses for it ([`Seeds::subject`]), so a saved fit
/// with `--draws N --keep-draws N` holds the same draws.
pub fn planning_fit(
    subject: &SubjectData,
    model: &PopulationModel,
    seeds: Seeds,
    draws: usize,
) -> Result<FitResult> {
    let options = FitOptions {
        method: Method::Map,
        intervals: Intervals::Posterior,
        draws,
        seed: seeds.0,
        keep_draws: draws,
        ..FitOptions::default()
    };
    fit_subject(subject, Some(model), &options, seeds.subject(subject.id.as_deref()))
}

/// One subject to plan for.
#[derive(Debug, Clone)]
pub struct PlanSubject {
    /// Identifier (`None` for a single unnamed subject).
    pub id: Option<String>,
    /// The doses given so far.
    pub history: Vec<Dose>,
    /// Time of the last level drawn (h), if any: the default start is not before it.
    pub last_level_h: Option<f64>,
    /// The posterior to plan over.
    pub posterior: Posterior,
    /// The fit's warnings.
    pub warnings: Vec<String>,
    /// Planned a priori: no levels, the draws are from the population model for the subject's
    /// covariates (the prior), not from a posterior.
    pub a_priori: bool,
}

/// The parts of a saved fit (`fit --format json --keep-draws N`) that planning reads.
#[derive(Debug, Clone, Deserialize)]
pub struct SavedFit {
    /// The fitted subjects, in the fit's order.
    pub subjects: Vec<SavedSubject>,
}

/// One subject of a saved fit.
#[derive(Debug, Clone, Deserialize)]
pub struct SavedSubject {
    /// The subject's identifier, when the data had one.
    pub subject: Option<String>,
    /// The point estimates.
    pub parameters: Params,
    /// The times of its levels: only they matter to planning (the start comes after them).
    #[serde(default)]
    pub levels: Vec<SavedLevel>,
    /// The residual error model of the fit.
    #[serde(default)]
    pub residual: Option<Residual>,
    /// Equal-weight posterior draws (`--keep-draws`).
    #[serde(default)]
    pub draws: Vec<Params>,
}

impl SavedFit {
    /// Read the JSON output of `cistern fit`.
    pub fn read(path: &str) -> Result<SavedFit> {
        let text = input::read_text(std::path::Path::new(path))?;
        serde_json::from_str(&text).map_err(|e| {
            InputError::in_file(path, format!("not a fit from `cistern fit --format json`: {e}"))
                .at_line(e.line() as u64)
                .into()
        })
    }
}

/// A level of a saved fit: only its time matters to planning.
#[derive(Debug, Clone, Deserialize)]
pub struct SavedLevel {
    /// When it was drawn (h).
    pub time_h: f64,
}

/// The latest of some times, if any.
fn latest(times: impl Iterator<Item = f64>) -> Option<f64> {
    times.reduce(f64::max)
}

impl PlanSubject {
    /// Fit a subject of a study (see [`super::Study::subject`]) against its model, keeping `draws`
    /// posterior draws.
    pub fn fitted(
        subject: &SubjectData,
        model: &PopulationModel,
        seeds: Seeds,
        draws: usize,
    ) -> Result<(PlanSubject, FitResult)> {
        let fit = planning_fit(subject, model, seeds, draws)?;
        let planned = PlanSubject {
            id: subject.id.clone(),
            history: subject.doses.clone(),
            last_level_h: latest(subject.levels.iter().map(|l| l.time_h)),
            posterior: Posterior { point: fit.parameters, draws: fit.draws.clone(), residual: fit.residual },
            warnings: fit.warnings.iter().map(|w| w.message.clone()).collect(),
            a_priori: false,
        };
        Ok((planned, fit))
    }

    /// A subject with levels fitted as [`PlanSubject::fitted`] does; one without levels planned
    /// [`PlanSubject::a_priori`] (no fit then).
    pub fn of(
        subject: &SubjectData,
        model: &PopulationModel,
        seeds: Seeds,
        draws: usize,
    ) -> Result<(PlanSubject, Option<FitResult>)> {
        if subject.levels.is_empty() {
            Ok((PlanSubject::a_priori(subject, model, seeds, draws)?, None))
        } else {
            PlanSubject::fitted(subject, model, seeds, draws).map(|(s, fit)| (s, Some(fit)))
        }
    }

    /// A subject without levels: `draws` parameter sets from the population model for its
    /// covariates (the between-subject variability of the model, as a sweep's virtual subjects
    /// with these covariates are drawn), the typical values as the point, the model's residual
    /// error for the advice. Draws come from the subject's own stream ([`Seeds::subject`]).
    pub fn a_priori(
        subject: &SubjectData,
        model: &PopulationModel,
        seeds: Seeds,
        draws: usize,
    ) -> Result<PlanSubject> {
        let fail = |m: String| Error::Usage(format!("a priori draws: {m}"));
        let cov = &subject.covariates;
        let absorption = model.absorption.as_ref();
        let (cl_l_h, v_l) = model.typical_cl_v(cov)?;
        let point = Params {
            cl_l_h,
            v_l,
            ka_per_h: absorption.map(|a| a.ka.typical),
            f: absorption.map_or(1.0, |a| a.f),
            tlag_h: absorption.map_or(0.0, |a| a.tlag_h),
        };
        let name = subject.id.clone().unwrap_or_default();
        let population =
            Population::from_model(model.clone(), CovariateSource::Pool(vec![(name, cov.clone())]))
                .map_err(fail)?;
        let stream = seeds.subject(subject.id.as_deref());
        let draws = (0..draws as u64)
            .map(|i| population.subject(stream, i).map(|s| s.params))
            .collect::<std::result::Result<Vec<_>, _>>()
            .map_err(fail)?;
        Ok(PlanSubject {
            id: subject.id.clone(),
            history: subject.doses.clone(),
            last_level_h: None,
            posterior: Posterior { point, draws, residual: Some(model.residual) },
            warnings: Vec::new(),
            a_priori: true,
        })
    }

    /// The wanted subject of a saved fit with posterior draws, and its dose history from the
    /// doses file (matched by identifier, or the only one when neither file names subjects).
    pub fn saved(
        fit_file: &Stated<PathBuf>,
        doses: &Setting<PathBuf>,
        wanted: &Setting<String>,
    ) -> Result<PlanSubject> {
        let path = fit_file.value.to_string_lossy().into_owned();
        let saved = SavedFit::read(&path)?;
        let s = pick(&saved.subjects, |s| s.subject.as_deref(), wanted, &path)?;
        if s.draws.is_empty() {
            return Err(InputError::in_file(
                &path,
                "the fit has no posterior draws: run `cistern fit` with --keep-draws 2000",
            )
            .into());
        }
        let doses_path = doses.required("the dose history is required with a saved fit")?.to_string_lossy();
        let file = parse_doses(&Table::read(&doses_path)?)?;
        let fitted = Stated { value: s.subject.clone(), origin: Origin::file(path.clone()) };
        let (_, history) = pick(&file.subjects, |(id, _)| id.as_deref(), &fitted, &doses_path)?;
        Ok(PlanSubject {
            id: s.subject.clone(),
            history: history.clone(),
            last_level_h: latest(s.levels.iter().map(|l| l.time_h)),
            posterior: Posterior { point: s.parameters, draws: s.draws.clone(), residual: s.residual },
            warnings: Vec::new(),
            a_priori: false,
        })
    }
}

/// The settings of a plan for `subject`: every value of the spec read and checked, with the
/// candidate grid, whose candidates not given (amounts, intervals, infusion durations) are
/// derived for the subject's point estimate; their derivation is stated in the grid's notes.
/// `None` for a subject that could not be read (its own problem is reported elsewhere): the
/// grid is then checked without deriving. `plan` and `report` both resolve their settings here.
pub fn plan_settings(spec: &Spec, subject: Option<&PlanSubject>) -> Result<Resolved> {
    let fallback = subject.map_or(Fallback::Unknown, |s| Fallback::Derived(&s.posterior.point));
    spec.resolve_with(Needs { grid: true }, fallback)
}

/// Whether to advise on the next level, and how.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NextLevel {
    /// The exposure to pin down; by default that of the first target.
    pub exposure: Option<Exposure>,
    /// Intervals of the new regimen searched for the sampling time; 0 for no advice.
    pub intervals: u32,
    /// The earliest a level may be drawn after the end of an intravenous dose (h).
    pub sample_after_h: f64,
}

impl Default for NextLevel {
    fn default() -> Self {
        NextLevel { exposure: None, intervals: 2, sample_after_h: DEFAULT_SAMPLE_AFTER_H }
    }
}

/// Rank the grid's candidates for the subject, recommend one within every limit, and advise
/// on the next level. The new regimen starts at `start_h`, by default one interval after the
/// last dose but not before the last level.
pub fn plan(
    subject: &PlanSubject,
    grid: &Grid,
    start_h: Option<f64>,
    next_level: NextLevel,
    seeds: Seeds,
) -> Result<Outcome> {
    let settings = Settings {
        candidates: &grid.candidates,
        targets: &grid.targets,
        limits: grid.limits,
        start_h,
        advise_on: next_level.exposure,
        advise_intervals: next_level.intervals,
        sample_after_h: next_level.sample_after_h,
        seed: seeds.plan(),
    };
    let record = Record { history: &subject.history, last_level_h: subject.last_level_h };
    Ok(plan_subject(&record, &subject.posterior, &settings)?)
}
