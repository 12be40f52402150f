//! The flags that state targets, safety limits and a grid of candidate regimens, shared by the
//! commands that compare regimens (`sweep`, `plan`).

use super::args::{Problems, flag_number, flag_value};
use cistern::case::{Case, GridText};
use cistern::dosing::{Regimen, Route};
use cistern::plan::candidates::{Durations, grid, parse_amounts, positive_list};
use cistern::plan::targets::{DEFAULT_MAX_RISK, Limits, Target, parse_target};
use cistern::units::Kind;
use cistern::{Error, InputError};
use clap::Args;

/// Shortest derived infusion (h) and the step it is rounded up to (h).
const DERIVED_MIN_H: f64 = 1.0;
const DERIVED_STEP_H: f64 = 0.5;

/// Targets, limits and the candidate grid.
#[derive(Args, Debug, Clone, Default)]
pub struct GridArgs {
    /// A target METRIC=LO..HI (either bound may be left out), repeatable: auc24, auc_day<N>,
    /// trough, peak, cavg, or above=C..@P% (at least P % of the interval above C), e.g.
    /// auc24=400..600, trough=10..20mg/l, above=2mg/l..@60%
    #[arg(long = "target", value_name = "METRIC=LO..HI", allow_hyphen_values = true)]
    pub targets: Vec<String>,
    /// Amounts to try: LO..HI/STEP or a list, e.g. 500..3000/250, 0.5g..3g/250mg, 750,1g
    #[arg(long, value_name = "AMOUNTS", allow_hyphen_values = true)]
    pub amounts: Option<String>,
    /// Dosing intervals to try, e.g. 6h,8h,12h,24h
    #[arg(long, value_name = "LIST", allow_hyphen_values = true)]
    pub every: Option<String>,
    /// Route of the candidates: bolus, infusion or oral [default: infusion]
    #[arg(long, value_name = "ROUTE")]
    pub route: Option<String>,
    /// Infusion durations to try, e.g. 1h,90min,2h [default with --max-rate: for each amount
    /// the shortest whole half hour, at least 1 h, that keeps within the rate limit]
    #[arg(long, value_name = "LIST", allow_hyphen_values = true)]
    pub durations: Option<String>,
    /// Largest single dose, e.g. 3g
    #[arg(long, value_name = "AMOUNT", allow_hyphen_values = true)]
    pub max_dose: Option<String>,
    /// Largest total dose over 24 h, e.g. 4g
    #[arg(long, value_name = "AMOUNT", allow_hyphen_values = true)]
    pub max_daily: Option<String>,
    /// Fastest infusion, with its unit, e.g. 10mg/min or 600mg/h
    #[arg(long, value_name = "RATE", allow_hyphen_values = true)]
    pub max_rate: Option<String>,
    /// Highest acceptable steady-state peak, e.g. 40 (mg/L)
    #[arg(long, value_name = "CONC", allow_hyphen_values = true)]
    pub max_peak: Option<String>,
    /// Highest acceptable steady-state trough, e.g. 20 (mg/L)
    #[arg(long, value_name = "CONC", allow_hyphen_values = true)]
    pub max_trough: Option<String>,
    /// Shortest acceptable dosing interval, e.g. 6h
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    pub min_every: Option<String>,
    /// Largest acceptable probability of breaking an exposure limit (0 to below 1)
    /// [default: 0.1]
    #[arg(long, value_name = "P", allow_hyphen_values = true)]
    pub max_risk: Option<String>,
}

impl GridArgs {
    /// The candidates, targets and limits, with every problem reported at once, each naming
    /// its flag.
    pub fn grid(&self) -> Result<(Vec<Regimen>, Vec<Target>, Limits), Error> {
        let mut problems = Problems::new();
        let mut targets = Vec::new();
        for spec in &self.targets {
            if let Some(t) = problems.take(parse_target(spec).map_err(|m| InputError::new("--target", m))) {
                targets.push(t);
            }
        }
        if self.targets.is_empty() {
            problems
                .push(InputError::new("--target", "give at least one target, e.g. --target auc24=400..600"));
        }
        let optional = |flag: &str, kind: Kind, text: &Option<String>, problems: &mut Problems| {
            text.as_ref().and_then(|t| problems.take(flag_value(flag, kind, t)))
        };
        let max_rate_mg_h = self.max_rate.as_ref().and_then(|t| {
            if t.trim().parse::<f64>().is_ok() {
                problems.push(InputError::new(
                    "--max-rate",
                    format!("give the rate with its unit, e.g. 10mg/min or 600mg/h, found '{t}'"),
                ));
                None
            } else {
                problems.take(flag_value("--max-rate", Kind::InputRate, t))
            }
        });
        let limits = Limits {
            max_dose_mg: optional("--max-dose", Kind::Amount, &self.max_dose, &mut problems),
            max_daily_mg: optional("--max-daily", Kind::Amount, &self.max_daily, &mut problems),
            max_rate_mg_h,
            max_peak_mg_l: optional("--max-peak", Kind::Concentration, &self.max_peak, &mut problems),
            max_trough_mg_l: optional("--max-trough", Kind::Concentration, &self.max_trough, &mut problems),
            min_every_h: optional("--min-every", Kind::Time, &self.min_every, &mut problems),
            max_risk: match &self.max_risk {
                Some(t) => problems.take(flag_number("--max-risk", t)).unwrap_or(DEFAULT_MAX_RISK),
                None => DEFAULT_MAX_RISK,
            },
        };
        if let Err(m) = limits.validate() {
            problems.push(InputError::new("limits", m));
        } else if let Err(m) = limits.conflicts_with(&targets) {
            problems.push(InputError::new("--target", m));
        }
        let route_text = self.route.as_deref().unwrap_or("infusion");
        let route = Route::parse(route_text);
        if route.is_none() {
            problems.push(InputError::new(
                "--route",
                format!("expected bolus, infusion or oral, found '{route_text}'"),
            ));
        }
        let list = |flag: &str, text: &Option<String>, parse: &dyn Fn(&str) -> Result<Vec<f64>, String>| {
            match text {
                Some(t) => parse(t).map_err(|m| InputError::new(flag, m)),
                None => Err(InputError::new(flag, format!("the candidate grid needs {flag}"))),
            }
        };
        let amounts = problems.take(list("--amounts", &self.amounts, &parse_amounts));
        let every = problems.take(list("--every", &self.every, &|t| positive_list(t, Kind::Time)));
        let durations = match (route, &self.durations) {
            (Some(Route::Infusion), Some(t)) => problems
                .take(positive_list(t, Kind::Time).map_err(|m| InputError::new("--durations", m)))
                .map(Durations::Fixed),
            (Some(Route::Infusion), None) => match limits.max_rate_mg_h {
                Some(rate) => Some(Durations::FromRate {
                    max_rate_mg_h: rate,
                    min_h: DERIVED_MIN_H,
                    step_h: DERIVED_STEP_H,
                }),
                None => {
                    problems.push(InputError::new(
                        "--durations",
                        "infusions need their durations (--durations 1h,2h) or a rate limit to derive \
                         them from (--max-rate 10mg/min)",
                    ));
                    None
                }
            },
            (Some(_), Some(_)) => {
                problems.push(InputError::new("--durations", "durations apply to --route infusion only"));
                None
            }
            (_, None) => Some(Durations::Fixed(Vec::new())),
            (None, Some(_)) => None,
        };
        problems.finish()?;
        let (Some(amounts), Some(every), Some(route), Some(durations)) = (amounts, every, route, durations)
        else {
            return Err(Error::Usage("the candidate grid could not be read".into()));
        };
        let candidates =
            grid(&amounts, &every, route, &durations).map_err(|m| InputError::new("candidate grid", m))?;
        Ok((candidates, targets, limits))
    }
}

/// The case-file key behind a grid flag (or behind `limits`, the limits taken together).
fn case_key(flag: &str) -> Option<&'static str> {
    Some(match flag {
        "--target" => "plan.targets",
        "--amounts" => "plan.amounts",
        "--every" => "plan.every",
        "--route" => "plan.route",
        "--durations" => "plan.durations",
        "--max-dose" => "limits.max_dose",
        "--max-daily" => "limits.max_daily",
        "--max-rate" => "limits.max_rate",
        "--max-peak" => "limits.max_peak",
        "--max-trough" => "limits.max_trough",
        "--min-every" => "limits.min_every",
        "--max-risk" => "limits.max_risk",
        "limits" => "limits",
        _ => return None,
    })
}

impl GridArgs {
    /// The candidates, targets and limits of these flags with the case (if any) filling in
    /// those left out. A problem with a value that came from the case names the case file
    /// and its key, not a flag that was never given.
    pub fn grid_or_case(&self, case: Option<&Case>) -> Result<(Vec<Regimen>, Vec<Target>, Limits), Error> {
        let Some(case) = case else { return self.grid() };
        self.or_case(&case.grid).grid().map_err(|e| match e {
            Error::Input(errors) => Error::Input(
                errors
                    .into_iter()
                    .map(|mut e| {
                        if let Some(key) = case_key(&e.source).filter(|_| !self.given(&e.source)) {
                            e.source = case.path.to_string_lossy().into_owned();
                            e.column = Some(key.to_string());
                        }
                        e
                    })
                    .collect(),
            ),
            other => other,
        })
    }

    /// Whether the value a problem is reported against (a flag, or `limits`) was given on
    /// the command line.
    fn given(&self, source: &str) -> bool {
        let limits = [
            ("--max-dose", &self.max_dose),
            ("--max-daily", &self.max_daily),
            ("--max-rate", &self.max_rate),
            ("--max-peak", &self.max_peak),
            ("--max-trough", &self.max_trough),
            ("--min-every", &self.min_every),
            ("--max-risk", &self.max_risk),
        ];
        match source {
            "--target" => !self.targets.is_empty(),
            "--amounts" => self.amounts.is_some(),
            "--every" => self.every.is_some(),
            "--route" => self.route.is_some(),
            "--durations" => self.durations.is_some(),
            "limits" => limits.iter().any(|(_, v)| v.is_some()),
            flag => limits.iter().find(|(f, _)| *f == flag).is_none_or(|(_, v)| v.is_some()),
        }
    }

    /// The grid, targets and limits of a case file, as the flags they stand for.
    fn from_case(g: &GridText) -> GridArgs {
        GridArgs {
            targets: g.targets.clone(),
            amounts: g.amounts.clone(),
            every: g.every.clone(),
            route: g.route.clone(),
            durations: g.durations.clone(),
            max_dose: g.max_dose.clone(),
            max_daily: g.max_daily.clone(),
            max_rate: g.max_rate.clone(),
            max_peak: g.max_peak.clone(),
            max_trough: g.max_trough.clone(),
            min_every: g.min_every.clone(),
            max_risk: g.max_risk.map(|r| r.to_string()),
        }
    }

    /// These flags, with the case filling in those left out.
    fn or_case(&self, g: &GridText) -> GridArgs {
        let case = GridArgs::from_case(g);
        GridArgs {
            targets: if self.targets.is_empty() { case.targets } else { self.targets.clone() },
            amounts: self.amounts.clone().or(case.amounts),
            every: self.every.clone().or(case.every),
            route: self.route.clone().or(case.route),
            durations: self.durations.clone().or(case.durations),
            max_dose: self.max_dose.clone().or(case.max_dose),
            max_daily: self.max_daily.clone().or(case.max_daily),
            max_rate: self.max_rate.clone().or(case.max_rate),
            max_peak: self.max_peak.clone().or(case.max_peak),
            max_trough: self.max_trough.clone().or(case.max_trough),
            min_every: self.min_every.clone().or(case.min_every),
            max_risk: self.max_risk.clone().or(case.max_risk),
        }
    }
}
