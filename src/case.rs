//! Case files (TOML, our own format): everything one analysis needs — the model, doses, levels
//! and covariates files, targets, limits, candidate regimens, seed and report options — with
//! file paths relative to the case file. Reading a case gives a [`Spec`] whose every value
//! carries its line and key; command-line flags override it value by value.
//!
//! ```toml
//! [case]
//! title = "P01: dosing after the first three days"
//! subject = "P01"
//! seed = 7
//!
//! [inputs]
//! model = "model.toml"
//! doses = "doses.csv"
//! levels = "levels.csv"
//! covariates = "covariates.csv"
//! # or, instead of doses, levels and covariates, an ADPPK dataset:
//! # adppk = "adppk.csv"
//! # analyte = "THEO"           # its PARAMCD, when it holds several
//! # map = ["amount_mg=AMT"]    # OURS=THEIRS column names
//!
//! [plan]
//! targets = ["auc24=400..600", "trough=..15"]
//! amounts = "500..2000/250"
//! every = "8h,12h,24h"
//! route = "infusion"
//! durations = "1h"
//!
//! [limits]
//! max_dose = "2g"
//! max_peak = "60mg/l"
//! ```
//!
//! A case with a `[population]` table names a population analysis instead: the model is the
//! start model, every subject of the study is analysed, and `cistern report` writes the
//! population report.
//!
//! ```toml
//! [population]
//! method = "laplace"   # or "quadrature" (the default)
//! nodes = 7            # quadrature nodes per random effect [default: chosen per subject and axis]
//! ```

use crate::error::{Origin, Result};
use crate::io::tomlfile::TomlText;
use crate::spec::{PopulationSpec, ReportSpec, Setting, Spec, Stated, SweepSpec};
use serde::Deserialize;
use std::path::{Path, PathBuf};
use toml::Spanned;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCase {
    case: Option<RawHeader>,
    inputs: RawInputs,
    fit: Option<RawFit>,
    plan: Option<RawPlan>,
    limits: Option<RawLimits>,
    sweep: Option<RawSweep>,
    population: Option<RawPopulation>,
    report: Option<RawReport>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawHeader {
    title: Option<String>,
    subject: Option<Spanned<String>>,
    seed: Option<Spanned<u64>>,
    note: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInputs {
    model: Option<Spanned<String>>,
    doses: Option<Spanned<String>>,
    levels: Option<Spanned<String>>,
    covariates: Option<Spanned<String>>,
    adppk: Option<Spanned<String>>,
    analyte: Option<Spanned<String>>,
    map: Option<Vec<Spanned<String>>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawFit {
    draws: Option<Spanned<u32>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPlan {
    targets: Option<Spanned<Vec<Spanned<String>>>>,
    amounts: Option<Spanned<String>>,
    every: Option<Spanned<String>>,
    route: Option<Spanned<String>>,
    durations: Option<Spanned<String>>,
    start: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawLimits {
    max_dose: Option<Spanned<String>>,
    max_daily: Option<Spanned<String>>,
    max_rate: Option<Spanned<String>>,
    max_peak: Option<Spanned<String>>,
    max_trough: Option<Spanned<String>>,
    min_every: Option<Spanned<String>>,
    max_risk: Option<Spanned<f64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSweep {
    subjects: Spanned<u64>,
    covariates: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPopulation {
    method: Option<Spanned<String>>,
    nodes: Option<Spanned<u64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawReport {
    title: Option<String>,
    author: Option<String>,
}

/// Read a case file into a spec: unknown keys, values of the wrong type and files that do not
/// exist are errors naming the key and its line. The values themselves are checked when the
/// spec is resolved, located at the same key and line.
///
/// ```
/// let spec = cistern::case::read("demo-regimens/p01.toml")?;
/// assert_eq!(spec.subject.value.as_deref(), Some("P01"));
/// let max_dose = &spec.grid.limits.max_dose;
/// assert_eq!(max_dose.value.as_deref(), Some("2.5g"));
/// assert_eq!(max_dose.origin.to_string(), "demo-regimens/p01.toml: line 27, key limits.max_dose");
/// # Ok::<(), cistern::Error>(())
/// ```
pub fn read(path: &str) -> Result<Spec> {
    let text = TomlText::read(path)?;
    let raw: RawCase = text.parse()?;
    let dir = Path::new(path).parent().map(Path::to_path_buf).unwrap_or_default();
    let at = |key: &str, span: Option<std::ops::Range<usize>>| {
        Origin::key(path, span.map(|s| text.line_of(s.start)), key)
    };
    let mut spec = Spec::unset(|key| at(key, None));
    spec.case = Some(PathBuf::from(path));
    let mut errors = Vec::new();
    let value = |v: &Option<Spanned<String>>, key: &str| -> Setting<String> {
        match v {
            Some(v) => Stated { value: Some(v.get_ref().clone()), origin: at(key, Some(v.span())) },
            None => Setting::unset(at(key, None)),
        }
    };
    let typed = |key: &str, v: Option<&Spanned<u64>>| match v {
        Some(v) => Stated { value: Some(*v.get_ref()), origin: at(key, Some(v.span())) },
        None => Setting::unset(at(key, None)),
    };
    // Paths are relative to the case file, and must exist.
    let mut file = |v: &Option<Spanned<String>>, key: &str| -> Setting<PathBuf> {
        let stated = value(v, key);
        let path = stated.value.as_ref().map(|p| dir.join(p));
        if let Some(p) = &path
            && !p.is_file()
        {
            errors.push(stated.problem(format!("the file '{}' does not exist", p.display())));
        }
        Stated { value: path, origin: stated.origin }
    };
    let inputs = &raw.inputs;
    spec.inputs.model = file(&inputs.model, "inputs.model");
    spec.inputs.doses = file(&inputs.doses, "inputs.doses");
    spec.inputs.levels = file(&inputs.levels, "inputs.levels");
    spec.inputs.covariates = file(&inputs.covariates, "inputs.covariates");
    spec.inputs.adppk = file(&inputs.adppk, "inputs.adppk");
    let options = &mut spec.inputs.adppk_options;
    options.analyte = inputs
        .analyte
        .as_ref()
        .map(|a| Stated { value: a.get_ref().clone(), origin: at("inputs.analyte", Some(a.span())) });
    options.map = inputs
        .map
        .iter()
        .flatten()
        .map(|m| Stated { value: m.get_ref().clone(), origin: at("inputs.map", Some(m.span())) })
        .collect();
    spec.sweep = raw.sweep.as_ref().map(|s| SweepSpec {
        subjects: typed("sweep.subjects", Some(&s.subjects)),
        covariates: file(&s.covariates, "sweep.covariates"),
    });
    spec.population = raw.population.as_ref().map(|p| PopulationSpec {
        method: value(&p.method, "population.method"),
        nodes: typed("population.nodes", p.nodes.as_ref()),
    });
    let header = raw.case.as_ref();
    spec.subject = value(&header.and_then(|h| h.subject.clone()), "case.subject");
    spec.seed = typed("case.seed", header.and_then(|h| h.seed.as_ref()));
    let draws = raw.fit.as_ref().and_then(|f| f.draws.as_ref());
    spec.draws =
        Stated { value: draws.map(|d| *d.get_ref()), origin: at("fit.draws", draws.map(|d| d.span())) };
    if let Some(plan) = &raw.plan {
        let grid = &mut spec.grid;
        if let Some(list) = &plan.targets {
            let items = list
                .get_ref()
                .iter()
                .map(|t| Stated { value: t.get_ref().clone(), origin: at("plan.targets", Some(t.span())) });
            grid.targets = Stated { value: Some(items.collect()), origin: at("plan.targets", None) };
        }
        grid.amounts = value(&plan.amounts, "plan.amounts");
        grid.every = value(&plan.every, "plan.every");
        grid.route = value(&plan.route, "plan.route");
        grid.durations = value(&plan.durations, "plan.durations");
        spec.start = value(&plan.start, "plan.start");
    }
    if let Some(l) = &raw.limits {
        let limits = &mut spec.grid.limits;
        limits.max_dose = value(&l.max_dose, "limits.max_dose");
        limits.max_daily = value(&l.max_daily, "limits.max_daily");
        limits.max_rate = value(&l.max_rate, "limits.max_rate");
        limits.max_peak = value(&l.max_peak, "limits.max_peak");
        limits.max_trough = value(&l.max_trough, "limits.max_trough");
        limits.min_every = value(&l.min_every, "limits.min_every");
        if let Some(r) = &l.max_risk {
            limits.max_risk =
                Stated { value: Some(*r.get_ref()), origin: at("limits.max_risk", Some(r.span())) };
        }
    }
    spec.report = ReportSpec {
        title: raw
            .report
            .as_ref()
            .and_then(|r| r.title.clone())
            .or_else(|| header.and_then(|h| h.title.clone())),
        author: raw.report.as_ref().and_then(|r| r.author.clone()),
        note: header.and_then(|h| h.note.clone()),
    };
    if errors.is_empty() { Ok(spec) } else { Err(errors.into()) }
}
