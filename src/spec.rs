//! The analysis spec: what one analysis asks for — its input files, the subject, seed and
//! draws, the targets, limits and candidate grid, a sweep, report options — as the user stated
//! it, every value with where it came from.
//!
//! A case file ([`crate::case`]) and the command line both produce a [`Spec`]; flags override
//! the case value by value ([`Stated::set`]). Nothing is parsed until the spec is resolved
//! ([`GridSpec::resolve`], [`Spec::seed`], …), once, and every problem then names the origin of
//! the value at fault: a line and key of the case file, or a flag. A value nobody gave keeps
//! the place where it would be given, so "missing" messages point there too.

use crate::dosing::{Regimen, Route};
use crate::engine::Params;
use crate::error::{Error, InputError, Origin, Place, Problems, Result};
use crate::plan::candidates::{
    DEFAULT_DURATION_H, DEFAULT_EVERY_H, Durations, default_amounts, grid, parse_amounts, positive_list,
};
use crate::plan::targets::{DEFAULT_MAX_RISK, Limits, Metric, Target, parse_target};
use crate::units::{Kind, parse_value};
use std::ops::RangeInclusive;
use std::path::PathBuf;

/// Posterior (or importance-sampling) draws one analysis may ask for.
pub const DRAWS: RangeInclusive<u32> = 100..=1_000_000;
/// Virtual subjects one sweep may ask for.
pub const SWEEP_SUBJECTS: RangeInclusive<u64> = 1..=10_000_000;
/// The seed when none is given.
pub const DEFAULT_SEED: u64 = 1;
/// Posterior draws when none are asked for.
pub const DEFAULT_DRAWS: u32 = 2000;

/// Shortest infusion derived from a rate limit (h), and the step it is rounded up to (h).
const DERIVED_MIN_H: f64 = 1.0;
const DERIVED_STEP_H: f64 = 0.5;

/// A value and where it came from. In a [`Spec`] the value is an `Option`: `None` when nobody
/// gave it, the origin then being where it would be given.
#[derive(Debug, Clone, PartialEq)]
pub struct Stated<T> {
    /// The value.
    pub value: T,
    /// Where it came from.
    pub origin: Origin,
}

/// One setting of a spec: given or not, with its origin.
pub type Setting<T> = Stated<Option<T>>;

impl<T> Stated<Option<T>> {
    /// A setting nobody gave yet, to be given at `origin`.
    pub fn unset(origin: Origin) -> Self {
        Stated { value: None, origin }
    }

    /// Override with a flag's value when the flag was given. When neither the flag nor a
    /// case file gave the value, the flag is where it should be given.
    pub fn set(&mut self, flag: &str, value: Option<T>) {
        match value {
            Some(v) => *self = Stated { value: Some(v), origin: Origin::Flag(flag.into()) },
            None if matches!(self.origin, Origin::Field(_)) => self.origin = Origin::Flag(flag.into()),
            None => {}
        }
    }

    /// A problem with this setting (its value, or its absence).
    pub fn problem(&self, message: impl Into<String>) -> InputError {
        InputError::at(self.origin.clone(), message)
    }

    /// The value, or a problem saying it is needed.
    pub fn required(&self, message: &str) -> std::result::Result<&T, InputError> {
        self.value.as_ref().ok_or_else(|| self.problem(message))
    }
}

impl Setting<String> {
    /// The text parsed as a quantity of `kind` (with units), when given.
    pub fn quantity(&self, kind: Kind) -> std::result::Result<Option<f64>, InputError> {
        self.value.as_deref().map(|t| parse_value(kind, t).map_err(|m| self.problem(m))).transpose()
    }
}

/// The files a study is read from.
#[derive(Debug, Clone, PartialEq)]
pub struct Inputs {
    /// Population model (TOML).
    pub model: Setting<PathBuf>,
    /// Doses (CSV).
    pub doses: Setting<PathBuf>,
    /// Levels (CSV).
    pub levels: Setting<PathBuf>,
    /// Covariates (CSV), one row per subject.
    pub covariates: Setting<PathBuf>,
    /// Covariates for every subject, `NAME=VALUE`.
    pub covariate: Vec<Stated<String>>,
    /// An ADPPK dataset (CSV) holding the doses, levels and covariates instead of the three files.
    pub adppk: Setting<PathBuf>,
    /// How to read it: the analyte and the columns the user names.
    pub adppk_options: crate::io::adppk::AdppkOptions,
}

/// The candidate regimens, the targets and the limits, as stated.
#[derive(Debug, Clone, PartialEq)]
pub struct GridSpec {
    /// Targets, `METRIC=LO..HI` each.
    pub targets: Setting<Vec<Stated<String>>>,
    /// Amounts, `LO..HI/STEP` or a list.
    pub amounts: Setting<String>,
    /// Dosing intervals, a list.
    pub every: Setting<String>,
    /// Route of the candidates.
    pub route: Setting<String>,
    /// Infusion durations, a list.
    pub durations: Setting<String>,
    /// The safety limits.
    pub limits: LimitSpec,
}

/// The safety limits, as stated.
#[derive(Debug, Clone, PartialEq)]
pub struct LimitSpec {
    /// Largest single dose.
    pub max_dose: Setting<String>,
    /// Largest total dose over 24 h.
    pub max_daily: Setting<String>,
    /// Fastest infusion (a rate with its unit).
    pub max_rate: Setting<String>,
    /// Highest acceptable steady-state peak.
    pub max_peak: Setting<String>,
    /// Highest acceptable steady-state trough.
    pub max_trough: Setting<String>,
    /// Shortest acceptable dosing interval.
    pub min_every: Setting<String>,
    /// Largest acceptable probability of breaking an exposure limit.
    pub max_risk: Setting<f64>,
}

/// A virtual-population sweep, as stated.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepSpec {
    /// Virtual subjects.
    pub subjects: Setting<u64>,
    /// A covariate pool (CSV) to resample from.
    pub covariates: Setting<PathBuf>,
}

/// A population analysis, as stated (a case file's `[population]` table): the start model is
/// the inputs' model; the report then describes the population, not one subject.
#[derive(Debug, Clone, PartialEq)]
pub struct PopulationSpec {
    /// How each subject's likelihood is integrated (`quadrature` or `laplace`).
    pub method: Setting<String>,
    /// Gauss–Hermite nodes per random effect (quadrature); chosen per subject and axis when unset.
    pub nodes: Setting<u64>,
}

/// What a report shows besides the analysis.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ReportSpec {
    /// Title.
    pub title: Option<String>,
    /// Author.
    pub author: Option<String>,
    /// A note printed with the report.
    pub note: Option<String>,
}

/// One analysis, as stated.
#[derive(Debug, Clone, PartialEq)]
pub struct Spec {
    /// The case file the spec was read from, if any.
    pub case: Option<PathBuf>,
    /// The study's files.
    pub inputs: Inputs,
    /// The subject to analyse.
    pub subject: Setting<String>,
    /// Seed of every random draw.
    pub seed: Setting<u64>,
    /// Posterior draws.
    pub draws: Setting<u32>,
    /// When the new regimen starts (a time).
    pub start: Setting<String>,
    /// Candidates, targets and limits.
    pub grid: GridSpec,
    /// A sweep over a virtual population.
    pub sweep: Option<SweepSpec>,
    /// A population analysis (the report then is a population report).
    pub population: Option<PopulationSpec>,
    /// Report options.
    pub report: ReportSpec,
}

impl Spec {
    /// A spec with nothing given; each setting would be given at `origin(key)`, where `key` is
    /// the setting's case-file key (`inputs.levels`, `limits.max_dose`, …).
    pub fn unset(origin: impl Fn(&str) -> Origin) -> Spec {
        Spec {
            case: None,
            inputs: Inputs {
                model: Setting::unset(origin("inputs.model")),
                doses: Setting::unset(origin("inputs.doses")),
                levels: Setting::unset(origin("inputs.levels")),
                covariates: Setting::unset(origin("inputs.covariates")),
                covariate: Vec::new(),
                adppk: Setting::unset(origin("inputs.adppk")),
                adppk_options: Default::default(),
            },
            subject: Setting::unset(origin("case.subject")),
            seed: Setting::unset(origin("case.seed")),
            draws: Setting::unset(origin("fit.draws")),
            start: Setting::unset(origin("plan.start")),
            grid: GridSpec {
                targets: Setting::unset(origin("plan.targets")),
                amounts: Setting::unset(origin("plan.amounts")),
                every: Setting::unset(origin("plan.every")),
                route: Setting::unset(origin("plan.route")),
                durations: Setting::unset(origin("plan.durations")),
                limits: LimitSpec {
                    max_dose: Setting::unset(origin("limits.max_dose")),
                    max_daily: Setting::unset(origin("limits.max_daily")),
                    max_rate: Setting::unset(origin("limits.max_rate")),
                    max_peak: Setting::unset(origin("limits.max_peak")),
                    max_trough: Setting::unset(origin("limits.max_trough")),
                    min_every: Setting::unset(origin("limits.min_every")),
                    max_risk: Setting::unset(origin("limits.max_risk")),
                },
            },
            sweep: None,
            population: None,
            report: ReportSpec::default(),
        }
    }

    /// The spec of a library call or of flags alone: each setting named by its key until a
    /// flag claims it.
    pub fn new() -> Spec {
        Spec::unset(|key| Origin::Field(key.into()))
    }

    /// The seed of every random draw ([`DEFAULT_SEED`] when none is given).
    pub fn seed(&self) -> u64 {
        self.seed.value.unwrap_or(DEFAULT_SEED)
    }

    /// The number of posterior draws ([`DEFAULT_DRAWS`] when none is given), checked against
    /// [`DRAWS`].
    pub fn draws(&self) -> std::result::Result<usize, InputError> {
        let n = self.draws.value.unwrap_or(DEFAULT_DRAWS);
        if DRAWS.contains(&n) {
            Ok(n as usize)
        } else {
            Err(self.draws.problem(format!(
                "expected {} to {} posterior draws, found {n}",
                DRAWS.start(),
                DRAWS.end()
            )))
        }
    }

    /// When the new regimen starts (h), if stated.
    pub fn start_h(&self) -> std::result::Result<Option<f64>, InputError> {
        self.start.quantity(Kind::Time)
    }

    /// Every file the spec names, the case file first (for digests, and to keep outputs off
    /// inputs).
    pub fn files(&self) -> Vec<PathBuf> {
        let i = &self.inputs;
        let sweep_pool = self.sweep.as_ref().and_then(|s| s.covariates.value.clone());
        self.case
            .iter()
            .cloned()
            .chain(
                [&i.model, &i.doses, &i.levels, &i.covariates, &i.adppk]
                    .into_iter()
                    .filter_map(|s| s.value.clone()),
            )
            .chain(sweep_pool)
            .collect()
    }
}

impl Default for Spec {
    fn default() -> Self {
        Spec::new()
    }
}

/// Candidate regimens, targets and limits, read and checked.
#[derive(Debug, Clone, PartialEq)]
pub struct Grid {
    /// The candidate regimens, in grid order.
    pub candidates: Vec<Regimen>,
    /// The targets.
    pub targets: Vec<Target>,
    /// The limits.
    pub limits: Limits,
    /// How the candidates not given were derived, for the output.
    pub notes: Vec<String>,
    /// Values given that are implausible for their quantity, or infusion durations longer than
    /// every interval, each at its origin (a case key and line, or a flag).
    pub warnings: Vec<String>,
}

/// Where the candidates not given (amounts, intervals, infusion durations) come from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Fallback<'a> {
    /// Nowhere: a required grid must give them.
    None,
    /// Derived for these parameters (a subject's point estimate): the usual intervals, 1-h
    /// infusions, and amounts from the targets ([`default_amounts`]).
    Derived(&'a Params),
    /// Derived, but the parameters are unknown (they have a problem of their own): no grid, and
    /// no problem for the missing candidates.
    Unknown,
}

impl LimitSpec {
    /// The limits, with every problem located.
    pub fn resolve(&self) -> Result<Limits> {
        let mut problems = Problems::new();
        let max_rate_mg_h =
            match self.max_rate.value.as_deref() {
                Some(t) if t.trim().parse::<f64>().is_ok() => {
                    problems.push(self.max_rate.problem(format!(
                        "give the rate with its unit, e.g. 10mg/min or 600mg/h, found '{t}'"
                    )));
                    None
                }
                _ => problems.take(self.max_rate.quantity(Kind::InputRate)).flatten(),
            };
        let mut quantity = |s: &Setting<String>, kind| problems.take(s.quantity(kind)).flatten();
        let limits = Limits {
            max_dose_mg: quantity(&self.max_dose, Kind::Amount),
            max_daily_mg: quantity(&self.max_daily, Kind::Amount),
            max_rate_mg_h,
            max_peak_mg_l: quantity(&self.max_peak, Kind::Concentration),
            max_trough_mg_l: quantity(&self.max_trough, Kind::Concentration),
            min_every_h: quantity(&self.min_every, Kind::Time),
            max_risk: self.max_risk.value.unwrap_or(DEFAULT_MAX_RISK),
        };
        problems.finish()?;
        limits.validate().map_err(|e| Error::from(e).located(|field| self.origin_of(field)))?;
        Ok(limits)
    }

    /// Where the value of a field of [`Limits`] came from.
    fn origin_of(&self, field: &str) -> Option<Origin> {
        let setting = match field {
            "max_dose_mg" => &self.max_dose,
            "max_daily_mg" => &self.max_daily,
            "max_rate_mg_h" => &self.max_rate,
            "max_peak_mg_l" => &self.max_peak,
            "max_trough_mg_l" => &self.max_trough,
            "min_every_h" => &self.min_every,
            "max_risk" => return Some(self.max_risk.origin.clone()),
            // Two limits that contradict each other: the one a flag gave, else the trough's
            // key (no one line holds a contradiction).
            "limits" => {
                let flag = [&self.max_trough, &self.max_peak]
                    .into_iter()
                    .find(|s| matches!(s.origin, Origin::Flag(_)));
                return Some(
                    flag.map_or_else(|| self.max_trough.origin.without_line(), |s| s.origin.clone()),
                );
            }
            _ => return None,
        };
        Some(setting.origin.clone())
    }
}

impl GridSpec {
    /// The candidate grid, targets and limits, with every problem reported at once, each at
    /// the origin of the value at fault. Every value given is checked; a missing one is a
    /// problem only when the grid is `required`, else the grid is `None`.
    ///
    /// A grid built in code rather than read from a case file:
    ///
    /// ```
    /// use cistern::spec::{Spec, Stated};
    /// use cistern::{Origin, Route};
    ///
    /// let mut spec = Spec::new();
    /// let grid = &mut spec.grid;
    /// let target = Stated { value: "auc24=400..600".to_string(), origin: Origin::Field("target".into()) };
    /// grid.targets.value = Some(vec![target]);
    /// grid.amounts.value = Some("500..1500/250".into());
    /// grid.every.value = Some("12h,24h".into());
    /// grid.durations.value = Some("1h".into());
    /// let grid = spec.grid.resolve(true)?.expect("every part of the grid is given");
    /// assert_eq!(grid.candidates.len(), 5 * 2);
    /// assert!(grid.candidates.iter().all(|r| r.route == Route::Infusion && r.duration_h == 1.0));
    /// # Ok::<(), cistern::Error>(())
    /// ```
    pub fn resolve(&self, required: bool) -> Result<Option<Grid>> {
        self.resolve_with(required, Fallback::None)
    }

    /// [`GridSpec::resolve`], with the candidates not given taken from `fallback`.
    pub fn resolve_with(&self, required: bool, fallback: Fallback) -> Result<Option<Grid>> {
        let mut problems = Problems::new();
        let missing = |problems: &mut Problems, e: InputError| {
            if required {
                problems.push(e);
            }
        };
        let candidate_missing = |problems: &mut Problems, e: InputError| {
            if fallback == Fallback::None {
                missing(problems, e);
            }
        };
        let mut targets = Vec::new();
        match &self.targets.value {
            Some(list) if !list.is_empty() => {
                for t in list {
                    let parsed = parse_target(&t.value).map_err(|m| InputError::at(t.origin.clone(), m));
                    targets.extend(problems.take(parsed));
                }
            }
            _ => {
                missing(&mut problems, self.targets.problem("give at least one target, e.g. auc24=400..600"))
            }
        }
        let limits = problems.take_all(self.limits.resolve());
        if let Some(l) = &limits
            && let Err(e) = l.conflicts_with(&targets)
        {
            problems.push(e.located(self.targets.origin.without_line()));
        }
        let route_text = self.route.value.as_deref().unwrap_or("infusion");
        let route = Route::parse(route_text);
        if route.is_none() {
            problems
                .push(self.route.problem(format!("expected bolus, infusion or oral, found '{route_text}'")));
        }
        type Parse<'a> = &'a dyn Fn(&str) -> std::result::Result<Vec<f64>, String>;
        // Some(None): not given, to be derived; None: a problem.
        let list = |problems: &mut Problems, s: &Setting<String>, what: &str, parse: Parse| match &s.value {
            Some(text) => problems.take(parse(text).map_err(|m| s.problem(m))).map(Some),
            None if fallback != Fallback::None => Some(None),
            None => {
                missing(problems, s.problem(format!("the candidate grid needs {what}")));
                None
            }
        };
        let amounts = list(&mut problems, &self.amounts, "the amounts to try", &parse_amounts);
        let every = list(&mut problems, &self.every, "the dosing intervals to try", &|t| {
            positive_list(t, Kind::Time)
        });
        let max_rate = limits.as_ref().and_then(|l| l.max_rate_mg_h);
        let durations = match (route, &self.durations.value) {
            (Some(Route::Infusion), Some(t)) => problems
                .take(positive_list(t, Kind::Time).map_err(|m| self.durations.problem(m)))
                .map(Durations::Fixed),
            (Some(Route::Infusion), None) => match max_rate {
                Some(rate) => Some(Durations::FromRate {
                    max_rate_mg_h: rate,
                    min_h: DERIVED_MIN_H,
                    step_h: DERIVED_STEP_H,
                }),
                None if self.limits.max_rate.value.is_some() => None,
                None if fallback != Fallback::None => Some(Durations::Fixed(vec![DEFAULT_DURATION_H])),
                None => {
                    candidate_missing(
                        &mut problems,
                        self.durations.problem(
                            "infusions need their durations (e.g. 1h,2h) or a rate limit to derive them \
                             from (e.g. 10mg/min)",
                        ),
                    );
                    None
                }
            },
            (Some(r), Some(_)) => {
                let both = self.durations.origin.without_line();
                problems.push(InputError::at(
                    both,
                    format!("durations apply to infusions only, not to {r} doses"),
                ));
                None
            }
            (_, None) => Some(Durations::Fixed(Vec::new())),
            (None, Some(_)) => None,
        };
        problems.finish()?;
        let (Some(amounts), Some(every), Some(route), Some(durations), Some(limits), false) =
            (amounts, every, route, durations, limits, targets.is_empty())
        else {
            return Ok(None);
        };
        let mut notes = Vec::new();
        let every = every.unwrap_or_else(|| {
            let usual: Vec<f64> =
                DEFAULT_EVERY_H.into_iter().filter(|&t| limits.min_every_h.is_none_or(|m| t >= m)).collect();
            let list = if usual.is_empty() { limits.min_every_h.into_iter().collect() } else { usual };
            let text: Vec<String> = list.iter().map(|t| format!("{t}h")).collect();
            notes.push(format!(
                "intervals {}: the usual ones{}; {}",
                text.join(","),
                if limits.min_every_h.is_some() { " from the shortest allowed" } else { "" },
                to_choose(&self.every)
            ));
            list
        });
        if let (Durations::Fixed(d), None, Route::Infusion) = (&durations, &self.durations.value, route) {
            notes.push(format!("infusions over {} h; {}", d[0], to_choose(&self.durations)));
        }
        let amounts = match (amounts, fallback) {
            (Some(a), _) => a,
            (None, Fallback::Derived(point)) => {
                let duration = |amount: f64| match &durations {
                    Durations::Fixed(d) => d.first().copied().unwrap_or(0.0),
                    Durations::FromRate { max_rate_mg_h, min_h, .. } => (amount / max_rate_mg_h).max(*min_h),
                };
                let (a, what) = default_amounts(point, &targets, &every, route, duration, limits.max_dose_mg)
                    .map_err(|m| Error::from(self.amounts.problem(m)))?;
                notes.push(format!("{what}; {}", to_choose(&self.amounts)));
                a
            }
            (None, _) => return Ok(None),
        };
        let mut warnings: Vec<String> = [
            unusual(&self.amounts, Kind::Amount, &amounts),
            unusual(&self.every, Kind::Time, &every),
            unusual(&self.limits.max_dose, Kind::Amount, &limits.max_dose_mg.into_iter().collect::<Vec<_>>()),
            unusual(
                &self.limits.max_daily,
                Kind::Amount,
                &limits.max_daily_mg.into_iter().collect::<Vec<_>>(),
            ),
            unusual(
                &self.limits.max_peak,
                Kind::Concentration,
                &limits.max_peak_mg_l.into_iter().collect::<Vec<_>>(),
            ),
            unusual(
                &self.limits.max_trough,
                Kind::Concentration,
                &limits.max_trough_mg_l.into_iter().collect::<Vec<_>>(),
            ),
        ]
        .into_iter()
        .flatten()
        .collect();
        if let Durations::Fixed(d) = &durations {
            warnings.extend(unusual(&self.durations, Kind::Time, d));
            let longest_every = every.iter().copied().fold(0.0, f64::max);
            if let Some(long) = d.iter().find(|&&h| h > longest_every) {
                warnings.push(format!(
                    "{}: an infusion of {} h lasts longer than every dosing interval (at most {} h), so \
                     those candidates are left out{}",
                    self.durations.origin,
                    crate::limits::number(*long),
                    crate::limits::number(longest_every),
                    bare_hint(Kind::Time, Kind::Time.another_unit(1.0))
                ));
            }
        }
        let candidates =
            grid(&amounts, &every, route, &durations).map_err(|m| Error::from(self.amounts.problem(m)))?;
        // A target over day N continues each candidate to that day: bound the doses it adds.
        let last_day = targets.iter().filter_map(|t| match t.metric {
            Metric::AucDay { day } => Some(day),
            _ => None,
        });
        if let (Some(day), Some(tau)) = (last_day.max(), every.first()) {
            let doses = (24.0 * f64::from(day) / tau).ceil();
            crate::limits::check_doses(if doses < u64::MAX as f64 { doses as u64 } else { u64::MAX })
                .map_err(|m| {
                    Error::from(self.targets.problem(format!(
                        "{m}: auc_day{day} with doses every {} h",
                        crate::limits::number(*tau)
                    )))
                })?;
        }
        Ok(Some(Grid { candidates, targets, limits, notes, warnings }))
    }
}

/// A warning when a value a setting gives lies outside the plausible limits of `kind`: the
/// first such value, at the setting's origin (a case key and line, or a flag).
fn unusual(setting: &Setting<String>, kind: Kind, values: &[f64]) -> Option<String> {
    setting.value.as_ref()?;
    let (value, first) = values.iter().find_map(|&v| Some((v, crate::limits::implausible(kind, v)?)))?;
    let meant = crate::limits::plausible_unit(kind, value, 1.0);
    Some(format!("{}: {first}{}", setting.origin, bare_hint(kind, meant)))
}

/// The unit a number without one is read in, and `other` to write (the unit it was perhaps
/// meant in).
fn bare_hint(kind: Kind, other: Option<String>) -> String {
    let other = other.map_or_else(String::new, |u| format!("; write the unit to mean another, e.g. {u}"));
    format!(" (a number without a unit is read in {}{other})", crate::limits::unit_text(kind))
}

/// Where to give a setting that was derived instead: its flag, or its key in the case file
/// (`report` reads only the case).
fn to_choose(setting: &Setting<String>) -> String {
    match &setting.origin {
        Origin::File { path, place: Some(Place::Key(key)), .. } => format!("set {key} in {path} to choose"),
        other => format!("give {other} to choose"),
    }
}

/// What an analysis needs beyond the values given (which are always checked).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Needs {
    /// The candidate grid, targets and limits (for planning and sweeps).
    pub grid: bool,
}

/// A spec's values, read and checked.
#[derive(Debug, Clone, PartialEq)]
pub struct Resolved {
    /// Seed of every random draw.
    pub seed: u64,
    /// Posterior draws.
    pub draws: usize,
    /// When the new regimen starts (h), if stated.
    pub start_h: Option<f64>,
    /// Candidates, targets and limits, when complete.
    pub grid: Option<Grid>,
    /// Virtual subjects of the sweep, when the spec has one.
    pub sweep_subjects: Option<u64>,
}

impl Spec {
    /// Read and check every value given, and those `needs` asks for: every problem at once,
    /// each at its origin.
    pub fn resolve(&self, needs: Needs) -> Result<Resolved> {
        self.resolve_with(needs, Fallback::None)
    }

    /// [`Spec::resolve`], with the candidates not given taken from `fallback`.
    pub fn resolve_with(&self, needs: Needs, fallback: Fallback) -> Result<Resolved> {
        let mut problems = Problems::new();
        let draws = problems.take(self.draws());
        let start_h = problems.take(self.start_h());
        let grid = problems.take_all(self.grid.resolve_with(needs.grid, fallback));
        let sweep_subjects = match &self.sweep {
            Some(s) => problems.take(s.subjects()).map(Some),
            None => Some(None),
        };
        let ((draws, start_h), (grid, sweep_subjects)) =
            problems.finish_with(draws.zip(start_h).zip(grid.zip(sweep_subjects)))?;
        Ok(Resolved { seed: self.seed(), draws, start_h, grid, sweep_subjects })
    }
}

impl SweepSpec {
    /// The number of virtual subjects, checked against [`SWEEP_SUBJECTS`].
    pub fn subjects(&self) -> std::result::Result<u64, InputError> {
        let n = *self.subjects.required("give the number of subjects to draw, e.g. 10000")?;
        if SWEEP_SUBJECTS.contains(&n) {
            Ok(n)
        } else {
            Err(self.subjects.problem(format!(
                "expected at least {} and at most {} virtual subjects, found {n}",
                SWEEP_SUBJECTS.start(),
                SWEEP_SUBJECTS.end()
            )))
        }
    }
}
