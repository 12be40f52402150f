//! The inputs one subject's (or a study's) analysis reads: model, doses, levels, covariates,
//! matched by subject. Shared by `fit` and `plan`.

use super::args::{Problems, flag_number};
use cistern::case::Case;
use cistern::covariates::{Covariates, Sex, parse_covariates};
use cistern::fit::{FitOptions, FitResult, Intervals, Method, SubjectData, fit_subject, mix_seed};
use cistern::io::doses::parse_doses;
use cistern::io::levels::parse_levels;
use cistern::io::table::Table;
use cistern::model::PopulationModel;
use cistern::{Error, InputError};
use clap::Args;
use std::collections::HashMap;

/// Where the data are.
#[derive(Args, Debug, Clone)]
pub struct StudyArgs {
    /// A case file (TOML) naming the input files and settings; flags override it
    #[arg(long, value_name = "FILE")]
    pub case: Option<String>,
    /// Population model (TOML); needed for --method map and for planning
    #[arg(long, value_name = "FILE")]
    pub model: Option<String>,
    /// Doses CSV
    #[arg(long, value_name = "FILE")]
    pub doses: Option<String>,
    /// Levels CSV (time_<unit>, conc_<unit>, optional subject and lloq_<unit>)
    #[arg(long, value_name = "FILE")]
    pub levels: Option<String>,
    /// Covariates CSV (subject plus columns such as weight_kg, age_y, sex, scr_mg_dl, crcl_ml_min)
    #[arg(long, value_name = "FILE")]
    pub covariates: Option<String>,
    /// A covariate for every subject, NAME=VALUE (e.g. weight_kg=70, sex=F); repeatable
    #[arg(long = "covariate", value_name = "NAME=VALUE")]
    pub covariate: Vec<String>,
}

/// The inputs, read and matched.
pub struct Study {
    /// The population model, when given.
    pub model: Option<PopulationModel>,
    /// Subjects with doses and levels.
    pub subjects: Vec<SubjectData>,
    /// Notes for stderr.
    pub notes: Vec<String>,
}

impl StudyArgs {
    /// Every input file, to keep `-o` from writing over one.
    pub fn paths(&self) -> Vec<&str> {
        [
            self.case.as_deref(),
            self.doses.as_deref(),
            self.levels.as_deref(),
            self.model.as_deref(),
            self.covariates.as_deref(),
        ]
        .into_iter()
        .flatten()
        .collect()
    }

    /// These arguments with the files of the case file (if any) filled in where no flag gave
    /// one, and the case itself. A case that cannot be read ends the run with its problems:
    /// without it, whatever it would have supplied would be reported missing.
    pub fn with_case(&self) -> Result<(StudyArgs, Option<Case>), Error> {
        let Some(path) = &self.case else { return Ok((self.clone(), None)) };
        let case = Case::read(path).map_err(Error::Input)?;
        let text = |p: &Option<std::path::PathBuf>| p.as_ref().map(|p| p.to_string_lossy().into_owned());
        let merged = StudyArgs {
            case: self.case.clone(),
            model: self.model.clone().or_else(|| text(&case.model)),
            doses: self.doses.clone().or_else(|| Some(case.doses.to_string_lossy().into_owned())),
            levels: self.levels.clone().or_else(|| text(&case.levels)),
            covariates: self.covariates.clone().or_else(|| text(&case.covariates)),
            covariate: self.covariate.clone(),
        };
        Ok((merged, Some(case)))
    }

    /// An input the run needs and nobody gave: with a case, named as the case's key (its
    /// files stand in for the flags), else as the flag.
    pub fn missing(&self, flag: &str, key: &str, message: &str) -> InputError {
        match &self.case {
            Some(case) => {
                InputError::new(case, format!("{message}; the case names none: add {key}, or give {flag}"))
                    .in_column(key)
            }
            None => InputError::new(flag, message),
        }
    }

    /// Read the model and the subjects' data, recording every problem.
    pub fn load(&self, problems: &mut Problems) -> Option<Study> {
        if self.doses.is_none() {
            problems.push(InputError::new(
                "--doses",
                "the doses file is required, e.g. --doses doses.csv (or --case)",
            ));
            return None;
        }
        if self.levels.is_none() {
            problems.push(self.missing(
                "--levels",
                "inputs.levels",
                "the levels file is required, e.g. --levels levels.csv",
            ));
        }
        let model = self.model.as_ref().and_then(|path| take_all(problems, PopulationModel::read(path)));
        let (subjects, notes) = assemble(self, model.as_ref(), problems)?;
        if self.model.is_some() && model.is_none() {
            return None;
        }
        Some(Study { model, subjects, notes })
    }
}

/// The fit planning starts from: MAP against the model, with `draws` equal-weight posterior
/// draws kept. Shared by `plan` and `report`, so both plan from the same posterior.
pub fn planning_fit(
    subject: &SubjectData,
    model: &PopulationModel,
    seed: u64,
    draws: usize,
) -> Result<FitResult, Error> {
    let options = FitOptions {
        method: Method::Map,
        intervals: Intervals::Posterior,
        draws,
        seed,
        keep_draws: draws,
        ..FitOptions::default()
    };
    fit_subject(subject, Some(model), &options, mix_seed(seed, 0)).map_err(Error::Usage)
}

/// The seed and the number of posterior draws: a flag, else the case, else the defaults.
pub fn seed_and_draws(seed: Option<u64>, draws: Option<u32>, case: Option<&Case>) -> (u64, u32) {
    let defaults = FitOptions::default();
    (
        seed.or(case.and_then(|c| c.seed)).unwrap_or(defaults.seed),
        draws.or(case.and_then(|c| c.draws)).unwrap_or(defaults.draws as u32),
    )
}

/// Keep the value, or record every error.
pub fn take_all<T>(problems: &mut Problems, r: Result<T, Vec<InputError>>) -> Option<T> {
    r.map_err(|errors| errors.into_iter().for_each(|e| problems.push(e))).ok()
}

/// `NAME=VALUE` covariates from the command line.
fn flag_covariates(items: &[String], problems: &mut Problems) -> Covariates {
    let mut cov = Covariates::default();
    for item in items {
        let Some((name, value)) = item.split_once('=') else {
            problems.push(InputError::new("--covariate", format!("expected NAME=VALUE, found '{item}'")));
            continue;
        };
        let (name, value) = (name.trim(), value.trim());
        if name == "sex" {
            match value.to_ascii_uppercase().as_str() {
                "M" | "MALE" => cov.sex = Some(Sex::Male),
                "F" | "FEMALE" => cov.sex = Some(Sex::Female),
                _ => problems
                    .push(InputError::new("--covariate", format!("sex must be M or F, found '{value}'"))),
            }
        } else if let Some(v) = problems.take(flag_number("--covariate", value)) {
            if v < 0.0 {
                problems
                    .push(InputError::new("--covariate", format!("{name} must not be negative, found {v}")));
            } else {
                cov.set(name, v);
            }
        }
    }
    cov
}

/// Match doses, levels and covariates by subject, and derive the covariates the model needs.
fn assemble(
    args: &StudyArgs,
    model: Option<&PopulationModel>,
    problems: &mut Problems,
) -> Option<(Vec<SubjectData>, Vec<String>)> {
    let levels_path = args.levels.as_deref()?;
    let doses_path = args.doses.as_deref()?;
    let doses = take_all(problems, Table::read(doses_path).and_then(|t| parse_doses(&t)));
    let levels = take_all(problems, Table::read(levels_path).and_then(|t| parse_levels(&t)));
    let covariates = match &args.covariates {
        Some(path) => take_all(problems, Table::read(path).and_then(|t| parse_covariates(&t))),
        None => Some(Vec::new()),
    };
    let common = flag_covariates(&args.covariate, problems);
    let (doses, levels, covariates) = (doses?, levels?, covariates?);
    let mut notes = levels.notes.clone();
    if !doses.ignored_columns.is_empty() {
        notes.push(format!("{}: ignored columns: {}", doses_path, doses.ignored_columns.join(", ")));
    }
    let mut levels = levels;
    let dose_ids = doses.subjects.iter().any(|(s, _)| s.is_some());
    let level_ids = levels.subjects.iter().any(|(s, _)| s.is_some());
    if dose_ids != level_ids {
        // One subject named on one side only: pair them; otherwise it is ambiguous.
        match (&doses.subjects[..], &mut levels.subjects[..]) {
            ([(id, _)], [(level_id, _)]) => *level_id = id.clone(),
            _ => {
                problems.push(InputError::new(
                    levels_path,
                    "the doses and levels files must both have a subject column, or neither",
                ));
                return None;
            }
        }
    }
    let dose_of: HashMap<&Option<String>, &Vec<_>> = doses.subjects.iter().map(|(s, d)| (s, d)).collect();
    let cov_of: HashMap<&str, &Covariates> = covariates.iter().map(|(s, c)| (s.as_str(), c)).collect();
    let needed = model.map(|m| m.covariates_needed()).unwrap_or_default();
    let mut subjects = Vec::new();
    for (id, lv) in &levels.subjects {
        let name = id.clone().unwrap_or_else(|| "(single subject)".into());
        let Some(d) = dose_of.get(id) else {
            let first_row = lv.iter().map(|l| l.line).min().unwrap_or(0);
            problems.push(
                InputError::new(
                    levels_path,
                    format!("subject {name} has levels but no doses in {doses_path}"),
                )
                .at_line(first_row),
            );
            continue;
        };
        // Checked here too, so the message can name the levels file (the library cannot).
        let first_dose = d.iter().map(|x| x.time_h).fold(f64::INFINITY, f64::min);
        for l in lv.iter().filter(|l| l.time_h < first_dose) {
            let who = id.as_ref().map_or_else(String::new, |s| format!("subject {s}: "));
            problems.push(
                InputError::new(
                    levels_path,
                    format!("{who}a level at {} h comes before the first dose at {first_dose} h", l.time_h),
                )
                .at_line(l.line),
            );
        }
        let mut cov = id.as_deref().and_then(|s| cov_of.get(s)).map(|c| (*c).clone()).unwrap_or_default();
        for (k, v) in common.iter() {
            cov.set(k, v);
        }
        if common.sex.is_some() {
            cov.sex = common.sex;
        }
        if let Err(m) = cov.derive(&needed) {
            let source = args.covariates.clone().unwrap_or_else(|| "--covariate".into());
            problems.push(InputError::new(source, format!("subject {name}: {m}")));
            continue;
        }
        subjects.push(SubjectData { id: id.clone(), doses: d.to_vec(), levels: lv.clone(), covariates: cov });
    }
    let skipped: Vec<String> = doses
        .subjects
        .iter()
        .filter(|(s, _)| !levels.subjects.iter().any(|(l, _)| l == s))
        .map(|(s, _)| s.clone().unwrap_or_default())
        .collect();
    if !skipped.is_empty() {
        notes.push(format!("subjects with doses but no levels are not fitted: {}", skipped.join(", ")));
    }
    Some((subjects, notes))
}
