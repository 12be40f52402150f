//! Loading a study: the model, doses, levels and covariates files of a spec, read and matched
//! by subject, with the covariates the model needs derived.

use crate::covariates::{Covariates, parse_assignment, parse_covariates};
use crate::dosing::Dose;
use crate::error::{InputError, Origin, Problems, Result};
use crate::fit::SubjectData;
use crate::io::adppk::{AdppkLabels, read_adppk};
use crate::io::doses::{DoseFile, parse_doses};
use crate::io::levels::{LevelFile, parse_levels};
use crate::io::table::{Notices, Table};
use crate::model::PopulationModel;
use crate::spec::{Inputs, Setting, Stated};
use std::collections::{HashMap, HashSet};
use std::path::Path;

/// A study's data, read and matched by subject.
#[derive(Debug, Clone)]
pub struct Study {
    /// The population model, when the spec names one.
    pub model: Option<PopulationModel>,
    /// Subjects with doses and levels, in the order of the levels file.
    pub subjects: Vec<SubjectData>,
    /// Notes and warnings for the user (ignored columns, subjects left out).
    pub notices: Notices,
    /// What an ADPPK file said of the study (study ids, analyte, unit), when it was read from one.
    pub labels: Option<AdppkLabels>,
}

/// What a study must hold for the analysis at hand.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Required {
    /// The population model.
    pub model: bool,
    /// Levels (and so doses). Without them (no levels file, or one with no rows) the subjects
    /// are those of the doses file, else of the covariates file, else one unnamed subject
    /// with the covariates given for all: planning then starts from the model's prior.
    pub levels: bool,
}

fn text(p: &Path) -> String {
    p.to_string_lossy().into_owned()
}

impl Study {
    /// Read the study a spec names: every problem in every file at once, each located.
    ///
    /// ```
    /// use cistern::{Required, Spec, Study};
    ///
    /// let mut spec = Spec::new();
    /// let inputs = &mut spec.inputs;
    /// inputs.model.value = Some("demo-regimens/model.toml".into());
    /// inputs.doses.value = Some("demo-regimens/doses.csv".into());
    /// inputs.levels.value = Some("demo-regimens/levels.csv".into());
    /// inputs.covariates.value = Some("demo-regimens/covariates.csv".into());
    /// let study = Study::load(&spec.inputs, Required { model: true, levels: true })?;
    /// assert_eq!(study.subjects.len(), 3);
    /// // The model needs creatinine clearance: derived from the covariates file.
    /// assert!(study.subjects[0].covariates.get("crcl_ml_min").is_some());
    /// # Ok::<(), cistern::Error>(())
    /// ```
    pub fn load(inputs: &Inputs, required: Required) -> Result<Study> {
        let mut problems = Problems::new();
        let from_adppk = inputs.adppk.value.is_some();
        if from_adppk {
            for file in
                [&inputs.doses, &inputs.levels, &inputs.covariates].into_iter().filter(|f| f.value.is_some())
            {
                problems.push(file.problem(format!(
                    "give an ADPPK file ({}) or the doses, levels and covariates files, not both",
                    inputs.adppk.origin
                )));
            }
        }
        let (doses, levels) = if from_adppk {
            (Some(None), Some(None))
        } else if required.levels {
            let doses = problems.take(inputs.doses.required("the doses file is required"));
            let levels = problems.take(inputs.levels.required("the levels file is required"));
            (doses.map(|p| Some(p.as_path())), levels.map(|p| Some(p.as_path())))
        } else {
            (Some(inputs.doses.value.as_deref()), Some(inputs.levels.value.as_deref()))
        };
        let model = match &inputs.model.value {
            Some(path) => problems.take_all(PopulationModel::read(&text(path)).map_err(Into::into)),
            None if required.model => {
                problems.push(inputs.model.problem("the population model is required"));
                None
            }
            None => None,
        };
        let mut labels = None;
        let matched = match (doses, levels) {
            (Some(d), Some(l)) => assemble(inputs, d, l, model.as_ref(), &mut labels, &mut problems),
            _ => None,
        };
        let (subjects, mut notices) = problems.finish_with(matched)?;
        notices.warnings.extend(model.iter().flat_map(|m| m.warnings.iter().cloned()));
        notices.warnings.extend(crate::covariates::unusual(subjects.iter().map(|s| &s.covariates)));
        Ok(Study { model, subjects, notices, labels })
    }

    /// The subject a spec asks for, or the only one.
    pub fn subject(&self, wanted: &Setting<String>) -> std::result::Result<&SubjectData, InputError> {
        let holder = if self.subjects.iter().any(|s| !s.levels.is_empty()) {
            "the levels file"
        } else {
            "the doses and covariates files"
        };
        pick(&self.subjects, |s| s.id.as_deref(), wanted, holder)
    }
}

/// The item whose identifier is `wanted`, or the only item when none is wanted.
pub(crate) fn pick<'a, T>(
    items: &'a [T],
    id_of: impl Fn(&T) -> Option<&str>,
    wanted: &Setting<String>,
    holder: &str,
) -> std::result::Result<&'a T, InputError> {
    match (&wanted.value, items) {
        (Some(w), _) => items
            .iter()
            .find(|x| id_of(x) == Some(w.as_str()))
            .ok_or_else(|| wanted.problem(format!("no subject '{w}' in {holder}"))),
        (None, [only]) => Ok(only),
        (None, _) => Err(wanted.problem(format!(
            "the data hold {} subjects: choose one (e.g. {})",
            items.len(),
            items.iter().find_map(&id_of).unwrap_or("ID")
        ))),
    }
}

/// Covariates given for every subject (`NAME=VALUE`).
fn common_covariates(items: &[Stated<String>], problems: &mut Problems) -> Covariates {
    let mut cov = Covariates::default();
    for item in items {
        problems.take(
            parse_assignment(&mut cov, &item.value, &item.origin)
                .map_err(|m| InputError::at(item.origin.clone(), m)),
        );
    }
    cov
}

/// Where the covariates of the subjects came from (or would be given), for a problem with one
/// that is missing or was not entered by the user.
fn covariates_origin(inputs: &Inputs) -> Origin {
    match (inputs.covariates.value.as_ref().or(inputs.adppk.value.as_ref()), inputs.covariate.first()) {
        (Some(path), _) => Origin::file(text(path)),
        (None, Some(first)) => first.origin.clone(),
        (None, None) => inputs.covariates.origin.clone(),
    }
}

/// Derive the covariates the model needs and check that they give it positive typical values.
fn check_covariates(
    cov: &mut Covariates,
    needed: &[&str],
    model: Option<&PopulationModel>,
) -> Result<(), InputError> {
    cov.derive(needed)?;
    match model {
        Some(m) => m.typical_cl_v(cov).map(drop),
        None => Ok(()),
    }
}

/// What a study's data files hold, each `None` when it could not be read (its problems recorded).
struct Sources {
    doses: Option<Option<DoseFile>>,
    /// The levels with the path of the file that held them.
    levels: Option<Option<(String, LevelFile)>>,
    covariates: Option<Vec<(String, Covariates)>>,
    /// The file that held the doses, for messages.
    doses_path: String,
}

/// Read the study's data: the ADPPK file, or the doses, levels and covariates files named.
fn read_sources(
    inputs: &Inputs,
    doses_path: Option<&Path>,
    levels_path: Option<&Path>,
    labels: &mut Option<AdppkLabels>,
    problems: &mut Problems,
) -> Sources {
    if let Some(path) = &inputs.adppk.value {
        let path = text(path);
        let Some(adppk) = problems.take_all(read_adppk(&path, &inputs.adppk_options).map_err(Into::into))
        else {
            return Sources { doses: None, levels: None, covariates: None, doses_path: path };
        };
        *labels = Some(adppk.labels);
        let doses = DoseFile { notices: adppk.notices, ..adppk.doses };
        // A file with no observation rows of the analyte holds no levels.
        let levels = (!adppk.levels.subjects.is_empty()).then(|| (path.clone(), adppk.levels));
        return Sources {
            doses: Some(Some(doses)),
            levels: Some(levels),
            covariates: Some(adppk.covariates),
            doses_path: path,
        };
    }
    let doses = match doses_path.map(text) {
        Some(path) => {
            // A doses file with a header and no rows is no doses (a new patient), as is no file.
            let parsed = Table::read_maybe_empty(&path).and_then(|t| parse_doses(&t));
            problems.take_all(parsed.map_err(Into::into)).map(|d| Some(d).filter(|d| !d.subjects.is_empty()))
        }
        None => Some(None),
    };
    // A levels file with a header and no rows is no levels, as is no file.
    let levels = match levels_path.map(text) {
        Some(path) => problems
            .take_all(
                Table::read_maybe_empty(&path)
                    .and_then(|t| if t.rows.is_empty() { Ok(None) } else { parse_levels(&t).map(Some) })
                    .map_err(Into::into),
            )
            .map(|l| l.map(|l| (path, l))),
        None => Some(None),
    };
    let covariates = match &inputs.covariates.value {
        Some(path) => {
            problems.take_all(Table::read(&text(path)).and_then(|t| parse_covariates(&t)).map_err(Into::into))
        }
        None => Some(Vec::new()),
    };
    Sources { doses, levels, covariates, doses_path: doses_path.map(text).unwrap_or_default() }
}

/// Match doses, levels and covariates by subject, and derive the covariates the model needs.
fn assemble(
    inputs: &Inputs,
    doses_path: Option<&Path>,
    levels_path: Option<&Path>,
    model: Option<&PopulationModel>,
    labels: &mut Option<AdppkLabels>,
    problems: &mut Problems,
) -> Option<(Vec<SubjectData>, Notices)> {
    let Sources { doses, levels, covariates, doses_path } =
        read_sources(inputs, doses_path, levels_path, labels, problems);
    let common = common_covariates(&inputs.covariate, problems);
    let (doses, levels, covariates) = (doses?, levels?, covariates?);
    let needed = model.map(|m| m.covariates_needed()).unwrap_or_default();
    // Without a covariates file every subject has the values given for all: check them once,
    // so that a missing covariate is one problem, not one per subject.
    if inputs.covariates.value.is_none()
        && inputs.adppk.value.is_none()
        && let Err(mut e) = check_covariates(&mut common.clone(), &needed, model)
    {
        if inputs.covariate.is_empty() {
            e.message = format!("the model needs covariates, and none were given: {}", e.message);
        }
        problems.push(e.located(covariates_origin(inputs)));
        return None;
    }
    let Some((levels_path, mut levels)) = levels else {
        return without_levels(inputs, doses, &covariates, &common, (&needed, model), problems);
    };
    let Some(doses) = doses else {
        problems.push(match &inputs.doses.value {
            Some(path) => InputError::in_file(
                text(path),
                "the file has no doses, and levels need the doses before them",
            ),
            None => inputs.doses.problem("the doses file is required with levels"),
        });
        return None;
    };
    let mut notices = doses.notices.clone();
    notices.extend(levels.notices.clone());
    let dose_ids = doses.subjects.iter().any(|(s, _)| s.is_some());
    let level_ids = levels.subjects.iter().any(|(s, _)| s.is_some());
    if dose_ids != level_ids {
        // One subject named on one side only: pair them; otherwise it is ambiguous.
        match (&doses.subjects[..], &mut levels.subjects[..]) {
            ([(id, _)], [(level_id, _)]) => *level_id = id.clone(),
            _ => {
                problems.push(InputError::in_file(
                    &levels_path,
                    "the doses and levels files must both have a subject column, or neither",
                ));
                return None;
            }
        }
    }
    let dose_of: HashMap<&Option<String>, &Vec<_>> = doses.subjects.iter().map(|(s, d)| (s, d)).collect();
    let cov_of: HashMap<&str, &Covariates> = covariates.iter().map(|(s, c)| (s.as_str(), c)).collect();
    let mut subjects = Vec::new();
    for (id, lv) in &levels.subjects {
        let name = id.clone().unwrap_or_else(|| "(single subject)".into());
        let Some(d) = dose_of.get(id) else {
            let first_row = lv.iter().map(|l| l.line).min().unwrap_or(0);
            problems.push(
                InputError::in_file(&levels_path, format!("levels but no doses in {doses_path}"))
                    .at_line(first_row)
                    .for_subject(name),
            );
            continue;
        };
        let mut subject = SubjectData {
            id: id.clone(),
            doses: d.to_vec(),
            levels: lv.clone(),
            covariates: Covariates::default(),
        };
        let first_dose = subject.first_dose_h().unwrap_or(f64::INFINITY);
        for l in subject.levels_before_first_dose() {
            let who = id.as_ref().map_or_else(String::new, |s| format!("subject {s}: "));
            problems.push(
                InputError::in_file(
                    &levels_path,
                    format!("{who}a level at {} h comes before the first dose at {first_dose} h", l.time_h),
                )
                .at_line(l.line),
            );
        }
        let Some(cov) = subject_covariates(inputs, id, &cov_of, &common, (&needed, model), problems) else {
            continue;
        };
        subject.covariates = cov;
        subjects.push(subject);
    }
    let fitted: HashSet<&Option<String>> = levels.subjects.iter().map(|(s, _)| s).collect();
    let skipped: Vec<String> = doses
        .subjects
        .iter()
        .filter(|(s, _)| !fitted.contains(s))
        .map(|(s, _)| s.clone().unwrap_or_default())
        .collect();
    if !skipped.is_empty() {
        notices
            .notes
            .push(format!("subjects with doses but no levels are not fitted: {}", skipped.join(", ")));
    }
    Some((subjects, notices))
}

/// A subject's covariates: its row of the covariates file with those given for all laid over
/// it, the ones the model needs derived and checked against the model (`needs`); `None`
/// (with the problem) when they cannot be.
fn subject_covariates(
    inputs: &Inputs,
    id: &Option<String>,
    cov_of: &HashMap<&str, &Covariates>,
    common: &Covariates,
    (needed, model): (&[&str], Option<&PopulationModel>),
    problems: &mut Problems,
) -> Option<Covariates> {
    let row = id.as_deref().and_then(|s| cov_of.get(s));
    let mut cov = row.map(|c| (*c).clone()).unwrap_or_default();
    cov.overlay(common);
    match check_covariates(&mut cov, needed, model) {
        Ok(()) => Some(cov),
        Err(mut e) => {
            if row.is_none() && inputs.covariates.value.is_some() && e.field_name().is_some() {
                e.message += " (the subject has no row in the covariates file)";
            }
            let e = e.located(covariates_origin(inputs));
            problems.push(match id {
                Some(id) => e.for_subject(id.clone()),
                None => e,
            });
            None
        }
    }
}

/// The subjects of a study without levels: those of the doses file, else of the covariates
/// file, else one unnamed subject; each with its doses (none without a doses file).
fn without_levels(
    inputs: &Inputs,
    doses: Option<DoseFile>,
    covariates: &[(String, Covariates)],
    common: &Covariates,
    needs: (&[&str], Option<&PopulationModel>),
    problems: &mut Problems,
) -> Option<(Vec<SubjectData>, Notices)> {
    let cov_of: HashMap<&str, &Covariates> = covariates.iter().map(|(s, c)| (s.as_str(), c)).collect();
    let doses_notices = doses.as_ref().map(|file| file.notices.clone());
    let histories: Vec<(Option<String>, Vec<Dose>)> = match doses {
        Some(file) => file.subjects,
        None if covariates.is_empty() => vec![(None, Vec::new())],
        None => covariates.iter().map(|(id, _)| (Some(id.clone()), Vec::new())).collect(),
    };
    let mut subjects = Vec::new();
    for (id, doses) in histories {
        // An unnamed history takes the covariates file's only subject.
        let cov_id = match (&id, covariates) {
            (None, [(only, _)]) => Some(only.clone()),
            _ => id.clone(),
        };
        if let Some(cov) = subject_covariates(inputs, &cov_id, &cov_of, common, needs, problems) {
            subjects.push(SubjectData { id, doses, levels: Vec::new(), covariates: cov });
        }
    }
    let notices = doses_notices.unwrap_or_default();
    Some((subjects, notices))
}
