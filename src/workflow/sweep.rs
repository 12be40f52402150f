//! The virtual population a sweep draws from — a spec's model with covariates resampled or
//! drawn, or a table of individual estimates — and a whole sweep's summary.

use crate::covariates::parse_covariates;
use crate::error::{Error, InputError, Problems, Result};
use crate::io::digest::sha256_hex;
use crate::io::input;
use crate::io::output::full;
use crate::io::table::{Notices, Table};
use crate::model::PopulationModel;
use crate::spec::{Grid, Setting, Spec, Stated};
use crate::sweep::Sweep;
use crate::sweep::population::{CovariateSource, Population, parse_draw, parse_params};
use crate::sweep::state::{Setup, Shard, SweepState};
use crate::sweep::summary::Summary;
use serde_json::json;
use std::path::{Path, PathBuf};

/// Where a sweep's virtual subjects come from.
#[derive(Debug, Clone, PartialEq)]
pub enum Source {
    /// Drawn from the spec's population model; covariates resampled from the spec's sweep
    /// pool, drawn from these stated distributions (`NAME=normal:MEAN:SD`, …), or none.
    Model {
        /// Covariate distributions; empty to resample the pool (or to need no covariates).
        draws: Vec<Stated<String>>,
    },
    /// One subject per row of an individual-parameters table (`fit`'s CSV).
    Params {
        /// The table.
        path: Stated<PathBuf>,
        /// Oral bioavailability of every subject.
        f: f64,
        /// Oral lag time of every subject (h).
        tlag_h: f64,
    },
}

/// A virtual population, ready to sweep.
#[derive(Debug, Clone)]
pub struct VirtualPopulation {
    /// The population.
    pub population: Population,
    /// Subjects to sweep.
    pub subjects: u64,
    /// Its source, fingerprinted, for the sweep's setup (so shards can tell they read the same
    /// inputs).
    pub described: serde_json::Value,
    /// Notes and warnings for the user (the model's implausible values among them).
    pub notices: Notices,
}

fn text(p: &Path) -> String {
    p.to_string_lossy().into_owned()
}

/// A file's fingerprint.
fn fingerprint(path: &Path) -> Result<String> {
    Ok(sha256_hex(&input::read(path)?))
}

/// The covariate pool of a spec's sweep, when it names one.
fn pool(pool: &Setting<PathBuf>) -> Result<Option<CovariateSource>> {
    pool.value
        .as_ref()
        .map(|p| Ok(CovariateSource::Pool(parse_covariates(&Table::read(&text(p))?)?)))
        .transpose()
}

/// The virtual population of a spec from `source`; `oral` when a candidate is oral (the
/// subjects then need an absorption rate).
pub fn population(spec: &Spec, source: &Source, oral: bool) -> Result<VirtualPopulation> {
    match source {
        Source::Params { path, f, tlag_h } => {
            let file = text(&path.value);
            // Read once: the fingerprint is of the bytes parsed (a pipe cannot be read twice).
            let bytes = input::read(&path.value)?;
            if bytes.trim_ascii_start().starts_with(b"{") {
                return Err(InputError::in_file(
                    &file,
                    "this is JSON (the JSON output of `cistern fit`?): the parameters file is the CSV \
                     output of `cistern fit --format csv`, or any CSV with cl_l_h and v_l columns",
                )
                .into());
            }
            let (rows, notes) = parse_params(&Table::parse(&file, &bytes)?, oral, *f, *tlag_h)?;
            let described = json!({
                "params": sha256_hex(&bytes),
                "f": full(*f),
                "tlag_h": full(*tlag_h),
            });
            let subjects = rows.len() as u64;
            let notices = Notices { notes, warnings: Vec::new() };
            Ok(VirtualPopulation { population: Population::from_params(rows), subjects, described, notices })
        }
        Source::Model { draws } => model_population(spec, draws, oral),
    }
}

/// Subjects drawn from the spec's model.
fn model_population(spec: &Spec, draws: &[Stated<String>], oral: bool) -> Result<VirtualPopulation> {
    let mut problems = Problems::new();
    let model_path = problems
        .take(spec.inputs.model.required("a sweep draws its subjects from a population model").cloned());
    let model = model_path
        .as_ref()
        .and_then(|p| problems.take_all(PopulationModel::read(&text(p)).map_err(Into::into)));
    let no_pool = Setting::unset(spec.inputs.covariates.origin.clone());
    let sweep = spec.sweep.as_ref();
    let pool_setting = sweep.map_or(&no_pool, |s| &s.covariates);
    let subjects = match sweep {
        Some(s) => problems.take(s.subjects()),
        None => {
            problems.push(spec.inputs.model.problem("give the number of subjects to draw, e.g. 10000"));
            None
        }
    };
    let covariates = if draws.is_empty() {
        problems.take_all(pool(pool_setting)).map(|p| p.unwrap_or(CovariateSource::None))
    } else {
        let mut parsed = Vec::new();
        for d in draws {
            parsed
                .extend(problems.take(parse_draw(&d.value).map_err(|m| InputError::at(d.origin.clone(), m))));
        }
        Some(CovariateSource::Draws(parsed))
    };
    let ((model_path, model), (subjects, covariates)) =
        problems.finish_with(model_path.zip(model).zip(subjects.zip(covariates)))?;
    if oral && model.absorption.is_none() {
        return Err(InputError::in_file(
            text(&model_path),
            "oral candidates need an [absorption] table in the model",
        )
        .into());
    }
    let described = json!({
        "model": fingerprint(&model_path)?,
        "covariates": if draws.is_empty() { pool_setting.value.as_deref().map(fingerprint).transpose()? } else { None },
        "draws": draws.iter().map(|d| d.value.clone()).collect::<Vec<_>>(),
    });
    // A covariate the model needs and the source cannot give is the source's problem.
    let blame = match (&covariates, &pool_setting.value) {
        (CovariateSource::Draws(_), _) => draws[0].origin.clone(),
        (CovariateSource::Pool(_), Some(p)) => crate::Origin::file(text(p)),
        _ => crate::Origin::file(text(&model_path)),
    };
    let notices = Notices { notes: Vec::new(), warnings: model.warnings.clone() };
    let population =
        Population::from_model(model, covariates).map_err(|m| Error::from(InputError::at(blame, m)))?;
    Ok(VirtualPopulation { population, subjects, described, notices })
}

/// A whole (unsharded) sweep of the grid over `subjects` virtual subjects drawn from `model`,
/// with covariates resampled from `pool` when it names a file: the summary a report shows.
pub fn summary(
    model: &PopulationModel,
    pool_file: &Setting<PathBuf>,
    grid: &Grid,
    seed: u64,
    subjects: u64,
) -> Result<Summary> {
    let source = pool(pool_file)?.unwrap_or(CovariateSource::None);
    let population = Population::from_model(model.clone(), source).map_err(Error::Usage)?;
    let sweep = Sweep {
        population: &population,
        candidates: &grid.candidates,
        targets: &grid.targets,
        limits: &grid.limits,
        seed,
    };
    sweep.check()?;
    let tallies = sweep.run(0..subjects, None, &mut |_| {})?;
    let setup =
        Setup::new(serde_json::Value::Null, seed, subjects, &grid.candidates, &grid.targets, &grid.limits);
    Ok(Summary::of(&SweepState::new(setup, Shard::WHOLE, tallies, None)))
}
