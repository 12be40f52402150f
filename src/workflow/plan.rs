//! The subject a plan is for: a dose history and the posterior to plan over, from a fit made
//! on the spot or from a fit saved with its draws.

use super::study::pick;
use crate::dosing::Dose;
use crate::engine::Params;
use crate::error::{InputError, Origin, Result};
use crate::fit::{FitOptions, FitResult, Intervals, Method, SubjectData, fit_subject};
use crate::io::doses::parse_doses;
use crate::io::input;
use crate::io::table::Table;
use crate::model::{PopulationModel, Residual};
use crate::plan::session::{Exposure, Outcome, Posterior, Settings, plan_subject};
use crate::seeds::Seeds;
use crate::spec::{Grid, Setting, Stated};
use serde::Deserialize;
use std::path::PathBuf;

/// The fit planning starts from: MAP against the model, with `draws` equal-weight posterior
/// draws kept. `plan` and `report` both start here, so both plan from the same posterior.
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
    fit_subject(subject, Some(model), &options, seeds.planning_fit())
}

/// One subject to plan for.
#[derive(Debug, Clone)]
pub struct PlanSubject {
    /// Identifier (`None` for a single unnamed subject).
    pub id: Option<String>,
    /// The doses given so far.
    pub history: Vec<Dose>,
    /// The posterior to plan over.
    pub posterior: Posterior,
    /// The fit's warnings.
    pub warnings: Vec<String>,
}

/// The parts of a saved fit (`fit --format json --keep-draws N`) that planning reads.
#[derive(Deserialize)]
struct SavedFit {
    subjects: Vec<SavedSubject>,
}

#[derive(Deserialize)]
struct SavedSubject {
    subject: Option<String>,
    parameters: Params,
    #[serde(default)]
    residual: Option<Residual>,
    #[serde(default)]
    draws: Vec<Params>,
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
            posterior: Posterior { point: fit.parameters, draws: fit.draws.clone(), residual: fit.residual },
            warnings: fit.warnings.clone(),
        };
        Ok((planned, fit))
    }

    /// The wanted subject of a saved fit with posterior draws, and its dose history from the
    /// doses file (matched by identifier, or the only one when neither file names subjects).
    pub fn saved(
        fit_file: &Stated<PathBuf>,
        doses: &Setting<PathBuf>,
        wanted: &Setting<String>,
    ) -> Result<PlanSubject> {
        let path = fit_file.value.to_string_lossy().into_owned();
        let text = input::read_text(&fit_file.value)?;
        let saved: SavedFit = serde_json::from_str(&text).map_err(|e| {
            InputError::in_file(&path, format!("not a fit from `cistern fit --format json`: {e}"))
                .at_line(e.line() as u64)
        })?;
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
            posterior: Posterior { point: s.parameters, draws: s.draws.clone(), residual: s.residual },
            warnings: Vec::new(),
        })
    }
}

/// Whether to advise on the next level, and how.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct NextLevel {
    /// The exposure to pin down; by default that of the first target.
    pub exposure: Option<Exposure>,
    /// Intervals of the new regimen searched for the sampling time; 0 for no advice.
    pub intervals: u32,
}

impl Default for NextLevel {
    fn default() -> Self {
        NextLevel { exposure: None, intervals: 2 }
    }
}

/// Rank the grid's candidates for the subject, recommend one within every limit, and advise
/// on the next level. The new regimen starts at `start_h`, by default one interval after the
/// last dose.
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
        seed: seeds.plan(),
    };
    Ok(plan_subject(&subject.history, &subject.posterior, &settings)?)
}
