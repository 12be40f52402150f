//! Flag groups shared by several commands, and their conversion to typed inputs.
//!
//! Value flags accept a leading `-` (`allow_hyphen_values`), so `--start -12h` works and a
//! negative `--every -5h` reaches our own check, whose message names the flag.

use cistern::choice::Choice;
use cistern::dosing::{Dose, Regimen, Route, Schedule};
use cistern::engine::Params;
use cistern::error::Problems;
use cistern::io::output::{CAUTION, Format, RunFiles, Sink};
use cistern::io::table::Notices;
use cistern::limits;
use cistern::units::{Kind, is_bare, parse_value};
use cistern::{Error, InputError, Origin};
use clap::Args;
use clap::builder::{PossibleValue, PossibleValuesParser, TypedValueParser};
use std::io::IsTerminal;
use std::sync::Mutex;

/// The parser of a library [`Choice`]: its spellings are the possible values, listed in
/// `--help` with their descriptions, as clap's `ValueEnum` lists them.
pub fn choice<C: Choice + std::str::FromStr<Err = cistern::InputError> + Send + Sync>()
-> impl TypedValueParser<Value = C> {
    let values =
        C::ALL.iter().map(|c| PossibleValue::new(c.spelling()).help(c.about().trim_end_matches('.')));
    PossibleValuesParser::new(values).try_map(|text| text.parse::<C>())
}

/// The parser of a whole-number flag (`--seed`, `--draws`): with `allow_negative_numbers` on
/// the flag, `-1` reaches it and is refused naming the flag, instead of being read as an
/// unknown flag.
pub fn whole<T: std::str::FromStr>(text: &str) -> Result<T, String> {
    let t = text.trim();
    t.parse::<T>().map_err(|_| {
        if !t.is_empty() && t.bytes().all(|b| b.is_ascii_digit()) {
            format!("'{text}' is too large")
        } else {
            format!("expected a whole number, 0 or more, found '{text}'")
        }
    })
}

/// Where and how to print.
#[derive(Args, Debug, Clone)]
pub struct OutputArgs {
    /// Output format [default: table on a terminal, csv when piped or from the -o extension]
    #[arg(long, value_parser = choice::<Format>())]
    pub format: Option<Format>,
    /// Write the output to FILE (atomically; never over an input or another output; through
    /// a symbolic link to its target); `-` is stdout
    #[arg(short = 'o', long = "output", value_name = "FILE")]
    pub output: Option<String>,
    #[command(flatten)]
    pub notify: Notify,
}

/// What goes to stderr besides errors: the `-q` flag, the same on every command.
#[derive(Args, Debug, Clone, Default)]
pub struct Notify {
    /// Print no notes on stderr (errors, warnings and the caution are still printed)
    #[arg(short, long)]
    pub quiet: bool,
}

impl Notify {
    /// A note for the user on stderr, unless `--quiet`.
    pub fn note(&self, text: &str) {
        if !self.quiet {
            eprintln!("note: {}", super::printable(text));
        }
    }

    /// What reading the inputs had to say: notes unless `--quiet`, warnings always.
    pub fn notices(&self, notices: &Notices) {
        notices.notes.iter().for_each(|n| self.note(n));
        notices.warnings.iter().for_each(|w| eprintln!("warning: {}", super::printable(w)));
    }
}

impl OutputArgs {
    /// The chosen or inferred format.
    pub fn format(&self) -> Format {
        self.format.unwrap_or_else(|| Format::infer(self.output.as_deref(), std::io::stdout().is_terminal()))
    }

    /// Open the output (`-o`; stdout when not given) among the run's files, before the work.
    pub fn sink(&self, files: &mut RunFiles) -> Result<Sink, Error> {
        files.open(Origin::Flag("-o".into()), self.output.as_deref().unwrap_or("-"))
    }

    /// The width a table should fit, in characters: none for a file (`-o FILE`); else the
    /// COLUMNS environment variable when it holds a positive number, else the terminal's
    /// width when stdout is one, else none (a pipe takes the whole table).
    pub fn table_width(&self) -> Option<usize> {
        if self.output.as_deref().is_some_and(|o| o != "-") {
            return None;
        }
        let columns = std::env::var("COLUMNS").ok().and_then(|c| c.trim().parse::<usize>().ok());
        columns.filter(|&c| c > 0).or_else(|| {
            terminal_size::terminal_size_of(std::io::stdout())
                .map(|(terminal_size::Width(w), _)| usize::from(w))
        })
    }

    /// A progress bar over `len` steps of long work, described by `what` (`subjects fitted`):
    /// drawn on a terminal (stderr) unless `--quiet`, hidden otherwise, so piped runs and
    /// logs stay clean.
    pub fn progress_bar(&self, len: u64, what: &str) -> indicatif::ProgressBar {
        if !std::io::stderr().is_terminal() || self.notify.quiet {
            return indicatif::ProgressBar::hidden();
        }
        let bar = indicatif::ProgressBar::new(len);
        if let Ok(style) = indicatif::ProgressStyle::with_template(&format!(
            "{{bar:40}} {{pos}}/{{len}} {what}, {{eta}} left"
        )) {
            bar.set_style(style);
        }
        bar
    }

    /// A note for the user on stderr, unless `--quiet`.
    pub fn note(&self, text: &str) {
        self.notify.note(text);
    }

    /// The caution for CSV output, which must stay pure data: it goes to stderr.
    pub fn caution_for_csv(&self, format: Format) {
        if format == Format::Csv {
            eprintln!("caution: {CAUTION}");
        }
    }
}

/// Individual kinetic parameters.
#[derive(Args, Debug, Clone)]
pub struct ParamArgs {
    /// Clearance, e.g. 4.2 (L/h), 4.2l/h, 70ml/min
    #[arg(long, value_name = "CL", allow_hyphen_values = true)]
    pub cl: Option<String>,
    /// Volume of distribution, e.g. 48 (L), 48l, 48000ml
    #[arg(long, value_name = "V", allow_hyphen_values = true)]
    pub v: Option<String>,
    /// Elimination rate constant instead of --cl, e.g. 0.0875 (1/h), 0.0875/h
    #[arg(long, value_name = "K", conflicts_with = "cl", allow_hyphen_values = true)]
    pub k: Option<String>,
    /// Absorption rate constant for oral doses, e.g. 1.2 (1/h)
    #[arg(long, value_name = "KA", allow_hyphen_values = true)]
    pub ka: Option<String>,
    /// Oral bioavailability, 0 < F <= 1
    #[arg(long, value_name = "F", default_value = "1", allow_hyphen_values = true)]
    pub f: String,
    /// Oral absorption lag time, e.g. 0.5h or 30min
    #[arg(long, value_name = "TIME", default_value = "0", allow_hyphen_values = true)]
    pub tlag: String,
}

/// The flag that sets a field of the library's inputs.
pub fn flag_for(field: &str) -> &'static str {
    match field {
        "cl_l_h" => "--cl",
        "v_l" => "--v",
        "ka_per_h" => "--ka",
        "f" => "--f",
        "tlag_h" => "--tlag",
        "amount_mg" => "--dose",
        "every_h" => "--every",
        "count" => "--count",
        "duration_h" => "--duration",
        "start_h" => "--start",
        _ => "--route",
    }
}

/// A range problem reported against the flag that set the field.
pub fn invalid_flag(invalid: InputError) -> InputError {
    let flag = flag_for(invalid.field_name().unwrap_or_default());
    invalid.located(Origin::Flag(flag.into()))
}

/// Parse a flag's value with units, naming the flag in the error. A value outside the
/// plausible limits of its kind earns a warning ([`warn`]) that names the unit a bare number
/// was read in.
pub fn flag_value(flag: &str, kind: Kind, text: &str) -> Result<f64, InputError> {
    let value = parse_value(kind, text).map_err(|m| InputError::flag(flag, m))?;
    if let Some(unusual) = limits::implausible(kind, value) {
        let meant = limits::plausible_unit(kind, value, 1.0);
        warn(&format!("{flag} {}: {unusual}{}", text.trim(), bare_unit(kind, text, meant)));
    }
    Ok(value)
}

/// For a bare number, which unit it was read in and how to write `other` (the unit it was
/// perhaps meant in).
pub fn bare_unit(kind: Kind, text: &str, other: Option<String>) -> String {
    if !is_bare(text) {
        return String::new();
    }
    let other = other
        .map_or_else(String::new, |u| format!("; write the unit to mean another, e.g. {}{u}", text.trim()));
    format!(" (a bare number is read in {}{other})", limits::unit_text(kind))
}

/// A warning on stderr, printed once per text however often it arises (also under
/// `--quiet`: it may change what the user meant).
pub fn warn(text: &str) {
    static SEEN: Mutex<Vec<String>> = Mutex::new(Vec::new());
    let mut seen = SEEN.lock().unwrap_or_else(|poisoned| poisoned.into_inner());
    if !seen.iter().any(|s| s == text) {
        eprintln!("warning: {text}");
        seen.push(text.to_string());
    }
}

/// Parse a plain number flag.
pub fn flag_number(flag: &str, text: &str) -> Result<f64, InputError> {
    match text.trim().parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => Err(InputError::flag(flag, format!("expected a number, found '{text}'"))),
    }
}

impl ParamArgs {
    /// The parameters, with every problem reported.
    pub fn params(&self, problems: &mut Problems) -> Option<Params> {
        let v = match &self.v {
            Some(t) => problems.take(flag_value("--v", Kind::Volume, t)),
            None => {
                problems
                    .push(InputError::flag("--v", "the volume of distribution is required, e.g. --v 48l"));
                None
            }
        };
        let cl = match (&self.cl, &self.k) {
            (Some(t), _) => problems.take(flag_value("--cl", Kind::Clearance, t)),
            (None, Some(t)) => {
                problems.take(flag_value("--k", Kind::RateConstant, t)).zip(v).map(|(k, v)| k * v)
            }
            (None, None) => {
                problems.push(InputError::flag(
                    "--cl",
                    "give the clearance (--cl 4.2l/h) or the rate constant (--k 0.09/h)",
                ));
                None
            }
        };
        let ka = match &self.ka {
            Some(t) => problems.take(flag_value("--ka", Kind::RateConstant, t)).map(Some),
            None => Some(None),
        };
        let f = problems.take(flag_number("--f", &self.f));
        let tlag = problems.take(flag_value("--tlag", Kind::Time, &self.tlag));
        let (cl, v, ka, f, tlag) = (cl?, v?, ka?, f?, tlag?);
        let params = Params { cl_l_h: cl, v_l: v, ka_per_h: ka, f, tlag_h: tlag };
        // The engine owns the range checks; name the flag its complaint is about.
        if let Err(invalid) = params.validate(&[]) {
            let flag = match invalid.field_name().unwrap_or_default() {
                "cl_l_h" if self.cl.is_none() => "--k",
                field => flag_for(field),
            };
            problems.push(invalid.located(Origin::Flag(flag.into())));
            return None;
        }
        let half_life = params.half_life_h();
        if half_life > YEAR_H {
            let given = self.cl.as_deref().or(self.k.as_deref()).unwrap_or_default();
            let flag =
                if self.cl.is_some() { ("--cl", Kind::Clearance) } else { ("--k", Kind::RateConstant) };
            warn(&format!(
                "the half-life is {} h ({} years) with {} {given} and --v {}: check the values{}",
                limits::number(half_life),
                limits::number(half_life / YEAR_H),
                flag.0,
                self.v.as_deref().unwrap_or_default(),
                bare_unit(
                    flag.1,
                    given,
                    parse_value(flag.1, given).ok().and_then(|v| limits::plausible_unit(flag.1, v, 1.0))
                )
            ));
        }
        Some(params)
    }
}

/// A year in hours (365.25 days): a half-life or an infusion longer than this is a warning.
const YEAR_H: f64 = 8766.0;

/// A dose, or a regimen, given by flags.
#[derive(Args, Debug, Clone)]
pub struct RegimenArgs {
    /// Amount of each dose, e.g. 1g, 750mg, 750
    #[arg(long, value_name = "AMOUNT", allow_hyphen_values = true)]
    pub dose: Option<String>,
    /// Dosing interval, e.g. 12h, 720min, 1d [default: none, a single dose]
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    pub every: Option<String>,
    /// Number of doses (with --every) [default: 1]
    #[arg(long, value_name = "N", allow_negative_numbers = true, value_parser = whole::<u32>)]
    pub count: Option<u32>,
    /// Route: bolus, infusion or oral
    #[arg(long, value_name = "ROUTE", default_value = "infusion")]
    pub route: String,
    /// Infusion duration, e.g. 1h, 90min (infusions only)
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    pub duration: Option<String>,
    /// Time of the first dose, e.g. 0h
    #[arg(long, value_name = "TIME", default_value = "0", allow_hyphen_values = true)]
    pub start: String,
}

/// What the regimen flags describe.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Dosing {
    /// One dose: no --every, and --count 1 or none.
    Single(Dose),
    /// A dose repeated every interval from a start: --count times when given.
    Repeated {
        /// The repeated dose.
        regimen: Regimen,
        /// The number of doses, when given.
        count: Option<u32>,
        /// Time of the first dose (h).
        start_h: f64,
    },
}

impl RegimenArgs {
    /// True when any regimen flag other than the defaults was given.
    pub fn given(&self) -> bool {
        self.dose.is_some() || self.every.is_some() || self.count.is_some() || self.duration.is_some()
    }

    /// The dose or regimen the flags describe, with every problem reported: one dose unless
    /// --every is given (a single dose needs no interval).
    pub fn dosing(&self, problems: &mut Problems) -> Option<Dosing> {
        let amount = match &self.dose {
            Some(t) => problems.take(flag_value("--dose", Kind::Amount, t)),
            None => {
                problems.push(InputError::flag("--dose", "the dose amount is required, e.g. --dose 1g"));
                None
            }
        };
        let every = match (&self.every, self.count) {
            (Some(t), _) => problems.take(flag_value("--every", Kind::Time, t)).map(Some),
            (None, Some(n)) if n > 1 => {
                problems.push(InputError::flag(
                    "--every",
                    format!("{n} doses need the dosing interval, e.g. --every 12h"),
                ));
                None
            }
            (None, _) => Some(None),
        };
        let route = Route::parse(&self.route);
        if route.is_none() {
            problems.push(InputError::flag(
                "--route",
                format!("expected bolus, infusion or oral, found '{}'", self.route),
            ));
        }
        let duration = match (&self.duration, route) {
            (Some(t), _) => problems.take(flag_value("--duration", Kind::Time, t)),
            (None, Some(Route::Infusion)) => {
                problems.push(InputError::flag(
                    "--duration",
                    "an infusion needs its duration, e.g. --duration 1h (or choose --route bolus/oral)",
                ));
                None
            }
            (None, _) => Some(0.0),
        };
        let start = problems.take(flag_value("--start", Kind::Time, &self.start));
        let (amount_mg, route, duration_h, start_h) = (amount?, route?, duration?, start?);
        let dosing = match every? {
            None => {
                let dose = Dose { time_h: start_h, amount_mg, route, duration_h };
                dose.validate().map(|()| Dosing::Single(dose))
            }
            Some(every_h) => {
                let regimen = Regimen { amount_mg, every_h, duration_h, route };
                if route == Route::Infusion && duration_h > every_h && self.count.is_some_and(|n| n > 1) {
                    let text = self.duration.as_deref().unwrap_or_default();
                    warn(&format!(
                        "the infusion (--duration {}, {} h) lasts longer than the dosing interval ({} h), so \
                         infusions overlap{}",
                        text.trim(),
                        limits::number(duration_h),
                        limits::number(every_h),
                        bare_unit(Kind::Time, text, Kind::Time.another_unit(1.0))
                    ));
                }
                let check = match self.count {
                    Some(count) => Schedule { regimen, count, start_h }.validate(),
                    None => regimen.validate(),
                };
                check.map(|()| Dosing::Repeated { regimen, count: self.count, start_h })
            }
        };
        dosing.map_err(|invalid| problems.push(invalid_flag(invalid))).ok()
    }

    /// The dose history the flags describe: one dose, or --count doses every --every hours.
    pub fn history(&self, problems: &mut Problems) -> Option<Vec<Dose>> {
        match self.dosing(problems)? {
            Dosing::Single(dose) => Some(vec![dose]),
            Dosing::Repeated { regimen, count: Some(count), start_h } => {
                Some(Schedule { regimen, count, start_h }.doses())
            }
            Dosing::Repeated { count: None, .. } => {
                problems.push(InputError::flag("--count", "give the number of doses, e.g. --count 6"));
                None
            }
        }
    }
}
