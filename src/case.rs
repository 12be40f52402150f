//! Case files (TOML, our own format): everything one analysis needs — the model, doses, levels
//! and covariates files, targets, limits, candidate regimens, seed and report options — with
//! file paths relative to the case file. Command-line flags override the case.
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

use crate::error::InputError;
use crate::io::tomlfile::TomlText;
use crate::plan::candidates::{parse_amounts, positive_list};
use crate::plan::targets::parse_target;
use crate::units::{Kind, parse_value};
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
    report: Option<RawReport>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawHeader {
    title: Option<String>,
    subject: Option<String>,
    seed: Option<u64>,
    note: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInputs {
    model: Option<Spanned<String>>,
    doses: Spanned<String>,
    levels: Option<Spanned<String>>,
    covariates: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawFit {
    draws: Option<Spanned<u32>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPlan {
    targets: Option<Vec<Spanned<String>>>,
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
struct RawReport {
    title: Option<String>,
    author: Option<String>,
}

/// The candidate grid, targets and limits as written (the command-line syntax).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct GridText {
    /// `--target` specifications.
    pub targets: Vec<String>,
    /// `--amounts`.
    pub amounts: Option<String>,
    /// `--every`.
    pub every: Option<String>,
    /// `--route`.
    pub route: Option<String>,
    /// `--durations`.
    pub durations: Option<String>,
    /// `--max-dose`.
    pub max_dose: Option<String>,
    /// `--max-daily`.
    pub max_daily: Option<String>,
    /// `--max-rate`.
    pub max_rate: Option<String>,
    /// `--max-peak`.
    pub max_peak: Option<String>,
    /// `--max-trough`.
    pub max_trough: Option<String>,
    /// `--min-every`.
    pub min_every: Option<String>,
    /// `--max-risk`.
    pub max_risk: Option<f64>,
}

/// A virtual-population sweep the report should include.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepRequest {
    /// Virtual subjects.
    pub subjects: u64,
    /// Covariate pool to resample from.
    pub covariates: Option<PathBuf>,
}

/// A validated case.
#[derive(Debug, Clone, PartialEq)]
pub struct Case {
    /// The case file itself.
    pub path: PathBuf,
    /// Title for the report.
    pub title: Option<String>,
    /// Author line for the report.
    pub author: Option<String>,
    /// A note to print with the report.
    pub note: Option<String>,
    /// The subject to analyse.
    pub subject: Option<String>,
    /// Seed of all random draws.
    pub seed: Option<u64>,
    /// Population model file.
    pub model: Option<PathBuf>,
    /// Doses file.
    pub doses: PathBuf,
    /// Levels file.
    pub levels: Option<PathBuf>,
    /// Covariates file.
    pub covariates: Option<PathBuf>,
    /// Posterior draws.
    pub draws: Option<u32>,
    /// Time the new regimen starts (command-line syntax).
    pub start: Option<String>,
    /// Grid, targets and limits.
    pub grid: GridText,
    /// Optional sweep.
    pub sweep: Option<SweepRequest>,
}

impl Case {
    /// Read and validate a case file: unknown keys, values that do not parse, and files that
    /// do not exist are errors naming the key (and line) or the path.
    pub fn read(path: &str) -> Result<Case, Vec<InputError>> {
        let text = TomlText::read(path).map_err(|e| vec![e])?;
        let raw: RawCase = text.parse().map_err(|e| vec![e])?;
        let dir = Path::new(path).parent().map(Path::to_path_buf).unwrap_or_default();
        let mut errors = Vec::new();
        let mut file = |v: &Option<Spanned<String>>, key: &str| -> Option<PathBuf> {
            let v = v.as_ref()?;
            let p = dir.join(v.get_ref());
            if !p.is_file() {
                errors.push(text.error_at(
                    v.span(),
                    key,
                    format!("the file '{}' does not exist", p.display()),
                ));
            }
            Some(p)
        };
        let model = file(&raw.inputs.model, "inputs.model");
        let doses = file(&Some(raw.inputs.doses.clone()), "inputs.doses").unwrap_or_default();
        let levels = file(&raw.inputs.levels, "inputs.levels");
        let covariates = file(&raw.inputs.covariates, "inputs.covariates");
        let sweep = raw.sweep.as_ref().map(|s| SweepRequest {
            subjects: *s.subjects.get_ref(),
            covariates: file(&s.covariates, "sweep.covariates"),
        });
        if let Some(s) = &raw.sweep
            && !(1..=10_000_000).contains(s.subjects.get_ref())
        {
            errors.push(text.error_at(
                s.subjects.span(),
                "sweep.subjects",
                "expected 1 to 10,000,000 virtual subjects",
            ));
        }
        let mut check =
            |v: &Option<Spanned<String>>, key: &str, parse: &dyn Fn(&str) -> Result<(), String>| {
                let v = v.as_ref()?;
                if let Err(m) = parse(v.get_ref()) {
                    errors.push(text.error_at(v.span(), key, m));
                }
                Some(v.get_ref().clone())
            };
        let value = |kind: Kind| move |s: &str| parse_value(kind, s).map(|_| ());
        let plan = raw.plan.as_ref();
        let limits = raw.limits.as_ref();
        let mut grid = GridText {
            amounts: check(&plan.and_then(|p| p.amounts.clone()), "plan.amounts", &|s| {
                parse_amounts(s).map(|_| ())
            }),
            every: check(&plan.and_then(|p| p.every.clone()), "plan.every", &|s| {
                positive_list(s, Kind::Time).map(|_| ())
            }),
            route: check(&plan.and_then(|p| p.route.clone()), "plan.route", &|s| {
                crate::dosing::Route::parse(s)
                    .map(|_| ())
                    .ok_or_else(|| format!("expected bolus, infusion or oral, found '{s}'"))
            }),
            durations: check(&plan.and_then(|p| p.durations.clone()), "plan.durations", &|s| {
                positive_list(s, Kind::Time).map(|_| ())
            }),
            max_dose: check(
                &limits.and_then(|l| l.max_dose.clone()),
                "limits.max_dose",
                &value(Kind::Amount),
            ),
            max_daily: check(
                &limits.and_then(|l| l.max_daily.clone()),
                "limits.max_daily",
                &value(Kind::Amount),
            ),
            max_rate: check(
                &limits.and_then(|l| l.max_rate.clone()),
                "limits.max_rate",
                &value(Kind::InputRate),
            ),
            max_peak: check(
                &limits.and_then(|l| l.max_peak.clone()),
                "limits.max_peak",
                &value(Kind::Concentration),
            ),
            max_trough: check(
                &limits.and_then(|l| l.max_trough.clone()),
                "limits.max_trough",
                &value(Kind::Concentration),
            ),
            min_every: check(
                &limits.and_then(|l| l.min_every.clone()),
                "limits.min_every",
                &value(Kind::Time),
            ),
            max_risk: None,
            targets: Vec::new(),
        };
        let start = check(&plan.and_then(|p| p.start.clone()), "plan.start", &value(Kind::Time));
        for t in plan.and_then(|p| p.targets.as_ref()).into_iter().flatten() {
            match parse_target(t.get_ref()) {
                Ok(_) => grid.targets.push(t.get_ref().clone()),
                Err(m) => errors.push(text.error_at(t.span(), "plan.targets", m)),
            }
        }
        if let Some(r) = limits.and_then(|l| l.max_risk.as_ref()) {
            if (0.0..1.0).contains(r.get_ref()) {
                grid.max_risk = Some(*r.get_ref());
            } else {
                errors.push(text.error_at(r.span(), "limits.max_risk", "expected a probability in [0, 1)"));
            }
        }
        let draws = raw.fit.as_ref().and_then(|f| f.draws.as_ref()).map(|d| {
            if !(100..=100_000).contains(d.get_ref()) {
                errors.push(text.error_at(d.span(), "fit.draws", "expected 100 to 100,000 posterior draws"));
            }
            *d.get_ref()
        });
        if !errors.is_empty() {
            return Err(errors);
        }
        let header = raw.case.as_ref();
        Ok(Case {
            path: PathBuf::from(path),
            title: raw
                .report
                .as_ref()
                .and_then(|r| r.title.clone())
                .or_else(|| header.and_then(|h| h.title.clone())),
            author: raw.report.as_ref().and_then(|r| r.author.clone()),
            note: header.and_then(|h| h.note.clone()),
            subject: header.and_then(|h| h.subject.clone()),
            seed: header.and_then(|h| h.seed),
            model,
            doses,
            levels,
            covariates,
            draws,
            start,
            grid,
            sweep,
        })
    }

    /// Every input file the case names (for digests and for refusing to write over them).
    pub fn files(&self) -> Vec<&Path> {
        let mut out = vec![self.path.as_path()];
        out.extend(self.model.as_deref());
        out.push(self.doses.as_path());
        out.extend(self.levels.as_deref());
        out.extend(self.covariates.as_deref());
        out.extend(self.sweep.as_ref().and_then(|s| s.covariates.as_deref()));
        out
    }
}
