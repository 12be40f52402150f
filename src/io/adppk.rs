//! ADPPK, the CDISC ADaM population-PK analysis dataset, read from CSV into the same doses,
//! levels and covariates our own files give.
//!
//! One row per event and subject (`USUBJID`): `EVID` 1 is a dose (`AMT` at `AFRLT` hours,
//! `ROUTE` `ORAL` or `INTRAVENOUS`, an infusion's length from `RATE` or a duration column the
//! user names), `EVID` 0 an observation (`AVAL`, else `DV`, in the unit `AVALU`; `BLQFL` `Y`
//! or `BLQFN` 1 a level below the limit `ALLOQ`, in the same unit; `MDV` 1 a row not used).
//! Baseline covariates (`WTBL` kg, `HTBL` cm, `AGE` years, `SEX`, `BSABL` m², `BMIBL` kg/m²)
//! become covariates under our names. `PARAMCD` names the analyte: a file with several must
//! be read for one (`--analyte`). docs/formats.md ("ADPPK") lists every rule.
//!
//! ADPPK states no unit for `AMT`, `CREATBL`, `CRCLBL` or `EGFRBL`, and we never guess one: the
//! user states it by naming the column under one of our `<quantity>_<unit>` names
//! (`--map amount_mg=AMT`, `--map crcl_ml_min=CRCLBL`). The same `--map OURS=THEIRS` reads a
//! variable from a column named otherwise.
//!
//! What the tool does not model is refused, row by row and naming the variable: other events
//! (`EVID` 2, 3, 4), steady state before a dose (`SS` 1: our dose histories start from no drug),
//! routes other than oral and intravenous.

use super::doses::DoseFile;
use super::levels::{Level, LevelFile};
use super::output::CsvWriter;
use super::table::{Column, Fields, Notices, Row, Table};
use crate::covariates::{Covariates, is_name, parse_covariate_value, parse_sex};
use crate::dosing::{Dose, Route, validate_dose};
use crate::error::{InputError, lines_phrase};
use crate::spec::Stated;
use crate::units::Kind;
use std::collections::{BTreeSet, HashMap};

/// How to read an ADPPK file: the analyte to keep and the columns the user names.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct AdppkOptions {
    /// The `PARAMCD` of the analyte to read (`--analyte`).
    pub analyte: Option<Stated<String>>,
    /// `OURS=THEIRS` entries (`--map`).
    pub map: Vec<Stated<String>>,
}

/// What an ADPPK file holds, in our terms.
#[derive(Debug, Clone)]
pub struct Adppk {
    /// Dose histories per subject (notices are in [`Adppk::notices`]).
    pub doses: DoseFile,
    /// Levels per subject, of the analyte read.
    pub levels: LevelFile,
    /// Baseline covariates per subject, in order of first appearance.
    pub covariates: Vec<(String, Covariates)>,
    /// What the file says of the study besides the data.
    pub labels: AdppkLabels,
    /// Notes and warnings (columns not read, rows not used).
    pub notices: Notices,
}

/// What an ADPPK file says of its study besides the data, for results written in the
/// standard's terms (SDTM PP).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct AdppkLabels {
    /// `STUDYID` of each subject that has one.
    pub study_ids: HashMap<String, String>,
    /// Every analyte (`PARAMCD`) of the observation rows, sorted.
    pub analytes: Vec<String>,
    /// The analyte read, when the file names analytes.
    pub analyte: Option<String>,
    /// The concentration unit as the file writes it (`AVALU`), when one unit holds for all levels.
    pub conc_unit: Option<String>,
}

/// Read and parse the ADPPK file at `path`.
pub fn read_adppk(path: &str, options: &AdppkOptions) -> Result<Adppk, Vec<InputError>> {
    parse_adppk(&Table::read(path)?, options)
}

/// Baseline covariates read without a `--map`: (their column, our name). Their units are the
/// ones the standard states (kg, cm, years); `BSABL` and `BMIBL` have one unit in practice.
const COVARIATES: &[(&str, &str)] = &[
    ("WTBL", "weight_kg"),
    ("HTBL", "height_cm"),
    ("AGE", "age_y"),
    ("SEX", "sex"),
    ("BSABL", "bsa_m2"),
    ("BMIBL", "bmi_kg_m2"),
];

/// Covariates whose unit the standard leaves open: read only when the user names their unit.
const UNIT_NEEDED: &[(&str, &str)] =
    &[("CREATBL", "scr_mg_dl or scr_umol_l"), ("CRCLBL", "crcl_ml_min"), ("EGFRBL", "a name of yours")];

/// ADPPK variables we know and do not need (the route, not `CMT`, says where a dose goes).
const KNOWN_UNUSED: &[&str] =
    &["SUBJID", "NFRLT", "APRLT", "NPRLT", "DOSEA", "DOSEP", "CMT", "FORM", "PARAM", "SEXN", "AGEU"];

/// The columns of the variables we read, resolved from the standard's names and the map.
struct Columns {
    subject: Option<Column>,
    evid: Option<Column>,
    mdv: Option<Column>,
    time: Option<Column>,
    amount: Option<Column>,
    rate: Option<Column>,
    duration: Option<Column>,
    route: Option<Column>,
    /// The value columns in order of preference (AVAL, DV), or the one the user named.
    conc: Vec<Column>,
    /// The unit the user gave the value column (`conc_<unit>`), instead of `AVALU`.
    conc_factor: Option<f64>,
    unit: Option<Column>,
    lloq: Option<Column>,
    blqfl: Option<Column>,
    blqfn: Option<Column>,
    ss: Option<Column>,
    ii: Option<Column>,
    analyte: Option<Column>,
    study: Option<Column>,
    covariates: Vec<(String, Column)>,
}

/// Whether a table looks like ADPPK: it has `EVID` and `USUBJID`.
pub fn looks_like_adppk(table: &Table) -> bool {
    table.column("EVID").is_some() && table.column("USUBJID").is_some()
}

/// A column of `table` by name, with the unit factor and kind of an entry of ours.
fn with_unit(table: &Table, name: &str, factor: f64, kind: Option<Kind>) -> Option<Column> {
    table.column(name).map(|c| Column { factor, kind, ..c })
}

impl Columns {
    /// Resolve the columns, applying the map; problems with the map at its origins, a missing
    /// column at the header.
    fn resolve(table: &Table, options: &AdppkOptions, errors: &mut Vec<InputError>) -> Columns {
        let src = table.source.as_str();
        let mut cols = Columns {
            subject: table.column("USUBJID"),
            evid: table.column("EVID"),
            mdv: table.column("MDV"),
            time: with_unit(table, "AFRLT", 1.0, Some(Kind::Time)),
            amount: None,
            rate: table.column("RATE"),
            duration: None,
            route: table.column("ROUTE"),
            conc: ["AVAL", "DV"].iter().filter_map(|n| table.column(n)).collect(),
            conc_factor: None,
            unit: table.column("AVALU"),
            lloq: table.column("ALLOQ"),
            blqfl: table.column("BLQFL"),
            blqfn: table.column("BLQFN"),
            ss: table.column("SS"),
            ii: table.column("II"),
            analyte: table.column("PARAMCD"),
            study: table.column("STUDYID"),
            covariates: COVARIATES
                .iter()
                .filter_map(|(theirs, ours)| table.column(theirs).map(|c| (ours.to_string(), c)))
                .collect(),
        };
        let mut amount_mapped = false;
        for entry in &options.map {
            let problem = |m: String| InputError::at(entry.origin.clone(), m);
            let Some((ours, theirs)) = entry.value.split_once('=') else {
                errors.push(problem(format!(
                    "expected OURS=THEIRS (e.g. amount_mg=AMT), found '{}'",
                    entry.value
                )));
                continue;
            };
            let (ours, theirs) = (ours.trim().to_ascii_lowercase(), theirs.trim());
            let Some(column) = table.column(theirs) else {
                errors.push(problem(format!("{src} has no column '{theirs}'")));
                continue;
            };
            let unit = |kind: Kind, quantity: &str| -> Result<Option<f64>, String> {
                match crate::units::parse_name(&ours, &[(quantity, kind)])? {
                    Some(n) => Ok(Some(n.factor)),
                    None => Ok(None),
                }
            };
            let placed = match ours.as_str() {
                "subject" => {
                    cols.subject = Some(column);
                    Ok(())
                }
                "route" => {
                    cols.route = Some(column);
                    Ok(())
                }
                "analyte" => {
                    cols.analyte = Some(column);
                    Ok(())
                }
                "rate" => {
                    cols.rate = Some(column);
                    Ok(())
                }
                "conc" => {
                    cols.conc = vec![column];
                    Ok(())
                }
                _ if ours.starts_with("time_") => unit(Kind::Time, "time")
                    .map(|f| cols.time = f.map(|f| Column { factor: f, kind: Some(Kind::Time), ..column })),
                _ if ours.starts_with("amount_") => unit(Kind::Amount, "amount").map(|f| {
                    amount_mapped = true;
                    cols.amount = f.map(|f| Column { factor: f, kind: Some(Kind::Amount), ..column });
                }),
                _ if ours.starts_with("duration_") => unit(Kind::Time, "duration").map(|f| {
                    cols.duration = f.map(|f| Column { factor: f, kind: Some(Kind::Time), ..column })
                }),
                _ if ours.starts_with("conc_") => unit(Kind::Concentration, "conc").map(|f| {
                    cols.conc_factor = f;
                    cols.conc = vec![column];
                }),
                "time" | "amount" | "duration" => Err(format!(
                    "'{ours}' needs its unit: write {ours}_<unit> (e.g. {})",
                    match ours.as_str() {
                        "amount" => "amount_mg=AMT",
                        "time" => "time_h=AFRLT",
                        _ => "duration_h=TINF",
                    }
                )),
                _ if is_name(&ours) => {
                    cols.covariates.retain(|(o, c)| *o != ours && c.index != column.index);
                    cols.covariates.push((ours.clone(), column));
                    Ok(())
                }
                _ => Err(format!(
                    "'{ours}' is not a name of ours: expected subject, route, analyte, rate, conc, \
                     conc_<unit>, time_<unit>, amount_<unit>, duration_<unit> or a covariate name \
                     such as weight_kg"
                )),
            };
            if let Err(m) = placed {
                errors.push(problem(m));
            }
        }
        let header = |m: String, column: Option<&str>| {
            let e = InputError::in_file(src, m).at_line(table.header_line);
            match column {
                Some(c) => e.in_column(c.to_string()),
                None => e,
            }
        };
        if !amount_mapped {
            match table.column("AMT") {
                Some(c) => errors.push(header(
                    "ADPPK states no unit for AMT: say it with --map amount_mg=AMT (or amount_g, \
                     amount_ug)"
                        .into(),
                    Some(&c.name),
                )),
                None => errors.push(header(
                    "missing the dose amount AMT (or name the column with --map amount_mg=COLUMN)".into(),
                    None,
                )),
            }
        }
        for (name, what) in [
            (&cols.subject, "the subject USUBJID"),
            (&cols.evid, "the event type EVID"),
            (&cols.time, "the time AFRLT"),
        ] {
            if name.is_none() {
                errors.push(header(format!("missing {what}"), None));
            }
        }
        if let Some(age_unit) = table.column("AGEU")
            && cols.covariates.iter().any(|(o, _)| o == "age_y")
            && let Some(row) = table.rows.iter().find(|r| {
                let t = r.text(&age_unit);
                !t.is_empty() && !t.eq_ignore_ascii_case("YEARS")
            })
        {
            errors.push(row.error(
                src,
                Some(&age_unit),
                format!("AGE is read in years; found the unit '{}'", row.text(&age_unit)),
            ));
        }
        cols
    }

    /// Every column this reading uses.
    fn used(&self) -> Vec<usize> {
        let singles = [
            &self.subject,
            &self.evid,
            &self.mdv,
            &self.time,
            &self.amount,
            &self.rate,
            &self.duration,
            &self.route,
            &self.unit,
            &self.lloq,
            &self.blqfl,
            &self.blqfn,
            &self.ss,
            &self.ii,
            &self.analyte,
            &self.study,
        ];
        let mut used: Vec<usize> = singles.into_iter().flatten().map(|c| c.index).collect();
        used.extend(self.conc.iter().map(|c| c.index));
        used.extend(self.covariates.iter().map(|(_, c)| c.index));
        used
    }
}

/// A code 1 or 0 (also as exports write numeric columns, `1.0`, `0.0`): true or false.
#[allow(clippy::float_cmp)] // codes, exact in binary floating point
fn zero_one(text: &str) -> Option<bool> {
    let x = text.parse::<f64>().ok()?;
    if x == 1.0 {
        Some(true)
    } else if x == 0.0 {
        Some(false)
    } else {
        None
    }
}

/// The event of a row: `EVID` 0 or 1.
fn event(row: &Row, src: &str, evid: &Column) -> Result<bool, InputError> {
    match zero_one(row.text(evid)) {
        Some(dose) => Ok(dose),
        None => Err(row.error(
            src,
            Some(evid),
            format!(
                "expected EVID 1 (a dose) or 0 (an observation), found '{}'; other events are not \
                 modelled",
                row.text(evid)
            ),
        )),
    }
}

/// A 0/1 flag (`MDV`, `BLQFN`, `SS`): `None` when empty.
fn flag01(row: &Row, src: &str, column: &Column, what: &str) -> Result<Option<bool>, InputError> {
    let text = row.text(column);
    match zero_one(text) {
        _ if text.is_empty() => Ok(None),
        Some(x) => Ok(Some(x)),
        None => Err(row.error(src, Some(column), format!("expected {what} 0 or 1, found '{text}'"))),
    }
}

/// Read an ADPPK table: every problem at once, each with its line and variable.
pub fn parse_adppk(table: &Table, options: &AdppkOptions) -> Result<Adppk, Vec<InputError>> {
    let src = table.source.as_str();
    let mut errors = Vec::new();
    let cols = Columns::resolve(table, options, &mut errors);
    let (Some(subject), Some(evid), Some(time)) = (&cols.subject, &cols.evid, &cols.time) else {
        return Err(errors);
    };
    if !errors.is_empty() {
        return Err(errors);
    }
    let mut notices = Notices::default();

    // The analytes of the observation rows, and the one to read.
    let is_dose = |r: &Row| event(r, src, evid).unwrap_or(false);
    let analyte_of = |r: &Row| cols.analyte.as_ref().map_or("", |c| r.text(c)).to_string();
    let analytes: BTreeSet<String> =
        table.rows.iter().filter(|r| !is_dose(r)).map(|r| analyte_of(&r)).filter(|a| !a.is_empty()).collect();
    let analytes: Vec<String> = analytes.into_iter().collect();
    let analyte = match (&options.analyte, &analytes[..]) {
        (Some(wanted), _) if analytes.contains(&wanted.value) => Some(wanted.value.clone()),
        (Some(wanted), _) => {
            errors.push(InputError::at(
                wanted.origin.clone(),
                format!(
                    "no analyte (PARAMCD) '{}' in {src}; it holds: {}",
                    wanted.value,
                    if analytes.is_empty() { "none named".into() } else { analytes.join(", ") }
                ),
            ));
            return Err(errors);
        }
        (None, [] | [_]) => analytes.first().cloned(),
        (None, [first, ..]) => {
            let column = cols.analyte.as_ref();
            let row = table
                .rows
                .iter()
                .find(|r| !is_dose(r) && !analyte_of(r).is_empty() && analyte_of(r) != *first);
            let message = format!(
                "the file holds several analytes ({}): levels of different analytes cannot be \
                 mixed; choose one with --analyte",
                analytes.join(", ")
            );
            errors.push(match row {
                Some(r) => r.error(src, column, message),
                None => InputError::in_file(src, message),
            });
            return Err(errors);
        }
    };

    let mut doses: Vec<(Option<String>, Vec<Dose>)> = Vec::new();
    let mut levels: Vec<(Option<String>, Vec<Level>)> = Vec::new();
    let mut dose_slot: HashMap<String, usize> = HashMap::new();
    let mut level_slot: HashMap<String, usize> = HashMap::new();
    let mut covariates: Vec<(String, Covariates)> = Vec::new();
    // Per subject: its slot in `covariates`, and the line each covariate was first read on.
    let mut cov_slot: HashMap<String, (usize, HashMap<String, u64>)> = HashMap::new();
    let mut study_ids: HashMap<String, String> = HashMap::new();
    let mut first_line_of: HashMap<Fields, u64> = HashMap::new();
    let mut level_at: HashMap<(String, u64), u64> = HashMap::new();
    let mut units: BTreeSet<String> = BTreeSet::new();
    let (mut not_used, mut other_analyte) = (Vec::new(), Vec::new());
    let mut expanded = 0u64;

    for row in &table.rows {
        let before = errors.len();
        if let Some(first) = first_line_of.get(&row.fields) {
            errors.push(row.error(src, None, format!("this row repeats line {first}")));
            continue;
        }
        first_line_of.insert(row.fields, row.line);
        let id = row.text(subject).to_string();
        if id.is_empty() {
            errors.push(row.error(src, Some(subject), "expected a subject identifier, found an empty field"));
            continue;
        }
        let Some(dose_row) = errors_take(&mut errors, event(&row, src, evid)) else { continue };
        let t = errors_take(&mut errors, row.number(src, time));
        read_covariates(&row, src, &id, &cols, &mut covariates, &mut cov_slot, &mut errors);
        if let Some(study) = &cols.study
            && !row.text(study).is_empty()
        {
            study_ids.entry(id.clone()).or_insert_with(|| row.text(study).to_string());
        }
        if dose_row {
            let dose = read_dose(&row, src, &cols, &mut errors);
            let (Some(t), Some(dose), true) = (t, dose, errors.len() == before) else { continue };
            expanded += 1;
            if let Err(m) = crate::limits::check_doses(expanded) {
                errors.push(row.error(src, None, m));
                break;
            }
            let slot = *dose_slot.entry(id.clone()).or_insert_with(|| {
                doses.push((Some(id.clone()), Vec::new()));
                doses.len() - 1
            });
            doses[slot].1.push(Dose { time_h: t, ..dose });
            continue;
        }
        if analyte.as_ref().is_some_and(|a| *a != analyte_of(&row)) {
            other_analyte.push(row.line);
            continue;
        }
        let mdv = match &cols.mdv {
            Some(c) => errors_take(&mut errors, flag01(&row, src, c, "MDV")),
            None => Some(None),
        };
        if mdv == Some(Some(true)) {
            not_used.push(row.line);
            continue;
        }
        let level = read_level(&row, src, &cols, &mut units, &mut errors);
        let (Some(t), Some((conc_mg_l, lloq_mg_l)), true) = (t, level, errors.len() == before) else {
            continue;
        };
        if let Some(first) = level_at.insert((id.clone(), t.to_bits()), row.line) {
            errors.push(row.error(
                src,
                Some(time),
                format!("a second level at the same time ({t} h) for subject {id}, as on line {first}"),
            ));
            continue;
        }
        let slot = *level_slot.entry(id.clone()).or_insert_with(|| {
            levels.push((Some(id.clone()), Vec::new()));
            levels.len() - 1
        });
        levels[slot].1.push(Level { time_h: t, conc_mg_l, lloq_mg_l, line: row.line });
    }
    if !errors.is_empty() {
        return Err(errors);
    }
    for (_, d) in &mut doses {
        d.sort_by(|a, b| a.time_h.total_cmp(&b.time_h));
    }
    for (_, l) in &mut levels {
        l.sort_by(|a, b| a.time_h.total_cmp(&b.time_h));
    }
    if !not_used.is_empty() {
        notices.notes.push(format!("{src}: MDV 1, not used: {}", lines_phrase(&not_used)));
    }
    if !other_analyte.is_empty() {
        notices.notes.push(format!("{src}: other analytes, not read: {}", lines_phrase(&other_analyte)));
    }
    unread_columns(table, &cols, &mut notices);
    let conc_unit = match units.len() {
        1 => units.into_iter().next(),
        _ => None,
    };
    Ok(Adppk {
        doses: DoseFile { subjects: doses, notices: Notices::default() },
        levels: LevelFile { subjects: levels, notices: Notices::default() },
        covariates,
        labels: AdppkLabels { study_ids, analytes, analyte, conc_unit },
        notices,
    })
}

/// Keep the value, or record its problem.
fn errors_take<T>(errors: &mut Vec<InputError>, r: Result<T, InputError>) -> Option<T> {
    r.map_err(|e| errors.push(e)).ok()
}

/// A dose row's amount, route and duration (its time is read by the caller).
fn read_dose(row: &Row, src: &str, cols: &Columns, errors: &mut Vec<InputError>) -> Option<Dose> {
    let before = errors.len();
    let amount = cols.amount.as_ref()?;
    let a = if row.text(amount).is_empty() {
        errors.push(row.error(src, Some(amount), "a dose row (EVID 1) needs its amount"));
        None
    } else {
        errors_take(errors, row.number(src, amount))
    };
    if let Some(ss) = &cols.ss
        && let Some(Some(true)) = errors_take(errors, flag01(row, src, ss, "SS"))
    {
        let interval = cols.ii.as_ref().map_or("", |c| row.text(c));
        let message = if interval.is_empty() || interval.parse::<f64>().is_ok_and(|x| x == 0.0) {
            "SS 1 (steady state before this dose) needs the dosing interval II".to_string()
        } else {
            "SS 1 (steady state before this dose) is not supported: dose histories start from no \
             drug; write the doses that led to steady state as rows of their own"
                .to_string()
        };
        errors.push(row.error(src, Some(ss), message));
    }
    // An infusion's length: from the duration column the user named, else AMT / RATE.
    let duration =
        cols.duration.as_ref().and_then(|c| errors_take(errors, row.optional_number(src, c))).flatten();
    let rate = match &cols.rate {
        Some(c) => match row.text(c) {
            "" => None,
            text => match text.parse::<f64>() {
                Ok(0.0) => None,
                Ok(r) if r > 0.0 && r.is_finite() => Some(r),
                _ => {
                    errors.push(row.error(
                        src,
                        Some(c),
                        format!("expected a positive rate (amount per hour) or 0, found '{text}'"),
                    ));
                    None
                }
            },
        },
        None => None,
    };
    let from_rate = match (rate, &a) {
        (Some(r), Some(_)) => Some(row.text(amount).parse::<f64>().unwrap_or(0.0) / r),
        _ => None,
    };
    let d = match (duration.filter(|d| *d > 0.0), from_rate) {
        (Some(d), Some(r)) if (d - r).abs() > 1e-9 * d.max(r) => {
            errors.push(row.error(
                src,
                cols.rate.as_ref(),
                format!("RATE gives an infusion of {r} h, the duration column {d} h"),
            ));
            None
        }
        (Some(d), _) | (None, Some(d)) => Some(d),
        (None, None) => Some(0.0),
    };
    let route = match &cols.route {
        None => {
            errors.push(row.error(src, None, "a dose row needs its ROUTE (ORAL or INTRAVENOUS)"));
            None
        }
        Some(c) => match (row.text(c).to_ascii_uppercase().as_str(), d) {
            ("ORAL", _) => Some(Route::Oral),
            ("INTRAVENOUS", Some(d)) if d > 0.0 => Some(Route::Infusion),
            ("INTRAVENOUS", _) => Some(Route::Bolus),
            (text, _) => {
                errors.push(row.error(
                    src,
                    Some(c),
                    format!(
                        "expected ROUTE ORAL or INTRAVENOUS, found '{text}': other routes are not \
                         modelled"
                    ),
                ));
                None
            }
        },
    };
    let (Some(a), Some(d), Some(route)) = (a, d, route) else { return None };
    if route == Route::Oral && d > 0.0 {
        errors.push(row.error(
            src,
            cols.duration.as_ref().or(cols.rate.as_ref()),
            "an oral dose with an input rate or duration (zero-order absorption) is not modelled",
        ));
    }
    if let Err(invalid) = validate_dose(a, route, d) {
        errors.push(row.error(src, Some(amount), invalid.message));
    }
    (errors.len() == before).then_some(Dose { time_h: 0.0, amount_mg: a, route, duration_h: d })
}

/// An observation row's level: (concentration, limit) in mg/L, the concentration `None` below
/// the limit. The unit each row is written in goes into `units`.
fn read_level(
    row: &Row,
    src: &str,
    cols: &Columns,
    units: &mut BTreeSet<String>,
    errors: &mut Vec<InputError>,
) -> Option<(Option<f64>, Option<f64>)> {
    let by_flag = match &cols.blqfl {
        Some(c) => match row.text(c).to_ascii_uppercase().as_str() {
            "" => None,
            "Y" => Some(true),
            "N" => Some(false),
            other => {
                errors.push(row.error(src, Some(c), format!("expected BLQFL Y or N, found '{other}'")));
                return None;
            }
        },
        None => None,
    };
    let by_number = match &cols.blqfn {
        Some(c) => errors_take(errors, flag01(row, src, c, "BLQFN"))?,
        None => None,
    };
    if let (Some(a), Some(b)) = (by_flag, by_number)
        && a != b
    {
        errors.push(row.error(src, cols.blqfn.as_ref(), "BLQFL and BLQFN disagree"));
        return None;
    }
    let blq = by_flag.or(by_number).unwrap_or(false);
    // The unit: the one the user named, else the row's AVALU.
    let factor = match (cols.conc_factor, &cols.unit) {
        (Some(f), _) => f,
        (None, Some(u)) => {
            let text = row.text(u);
            match Kind::Concentration.factor(text) {
                Some(f) => {
                    units.insert(text.to_string());
                    f
                }
                None => {
                    errors.push(row.error(
                        src,
                        Some(u),
                        format!("expected a concentration unit (ng/mL, ug/mL, mg/L, ug/L), found '{text}'"),
                    ));
                    return None;
                }
            }
        }
        (None, None) => {
            errors.push(row.error(
                src,
                None,
                "no unit for the level: give an AVALU column or name the unit with --map conc_ng_ml=AVAL",
            ));
            return None;
        }
    };
    let in_unit = |c: &Column| Column { factor, kind: Some(Kind::Concentration), ..c.clone() };
    let limit = match &cols.lloq {
        Some(c) => errors_take(errors, row.optional_number(src, &in_unit(c)))?,
        None => None,
    };
    if limit.is_some_and(|l| l <= 0.0) {
        errors.push(row.error(src, cols.lloq.as_ref(), "expected a positive quantification limit ALLOQ"));
        return None;
    }
    if blq {
        if limit.is_none() {
            let column = cols.blqfl.as_ref().or(cols.blqfn.as_ref());
            errors.push(row.error(src, column, "a level below the limit needs the limit ALLOQ"));
            return None;
        }
        return Some((None, limit));
    }
    // The value: the first non-empty value column; AVAL and DV must agree when both are given.
    let given: Vec<&Column> = cols.conc.iter().filter(|c| !row.text(c).is_empty()).collect();
    let Some(first) = given.first() else {
        let names: Vec<&str> = cols.conc.iter().map(|c| c.name.as_str()).collect();
        errors.push(row.error(
            src,
            cols.conc.first(),
            format!(
                "an observation row (EVID 0, MDV 0) needs its value ({}), or MDV 1 when it is not used",
                if names.is_empty() { "AVAL or DV".into() } else { names.join(" or ") }
            ),
        ));
        return None;
    };
    if let [a, b] = given[..]
        && row.text(a).parse::<f64>().ok() != row.text(b).parse::<f64>().ok()
    {
        errors.push(row.error(
            src,
            Some(b),
            format!(
                "{} ({}) and {} ({}) differ; say which to read with --map conc={}",
                a.name,
                row.text(a),
                b.name,
                row.text(b),
                a.name
            ),
        ));
        return None;
    }
    let v = errors_take(errors, row.number(src, &in_unit(first)))?;
    if v < 0.0 {
        errors.push(row.error(src, Some(first), "a concentration cannot be negative"));
        return None;
    }
    Some((Some(v), limit))
}

/// The baseline covariates on a row, checked against the subject's earlier rows.
fn read_covariates(
    row: &Row,
    src: &str,
    id: &str,
    cols: &Columns,
    all: &mut Vec<(String, Covariates)>,
    slots: &mut HashMap<String, (usize, HashMap<String, u64>)>,
    errors: &mut Vec<InputError>,
) {
    let (slot, first_lines) = slots.entry(id.to_string()).or_insert_with(|| {
        all.push((id.to_string(), Covariates::default()));
        (all.len() - 1, HashMap::new())
    });
    let cov = &mut all[*slot].1;
    for (ours, column) in &cols.covariates {
        let text = row.text(column);
        if text.is_empty() {
            continue;
        }
        let at = || row.error(src, Some(column), "");
        let value = if ours == "sex" {
            parse_sex(text).map(|s| (f64::NAN, Some(s)))
        } else {
            parse_covariate_value(ours, text).map(|v| (v, None))
        };
        let (value, sex) = match value {
            Ok(v) => v,
            Err(message) => {
                errors.push(InputError { message, ..at() });
                continue;
            }
        };
        let before = if ours == "sex" {
            cov.sex.map(|s| (f64::NAN, Some(s)))
        } else {
            cov.get(ours).map(|v| (v, None))
        };
        match (before, first_lines.get(ours)) {
            (Some((b, bs)), Some(line)) => {
                if bs != sex || (sex.is_none() && b.to_bits() != value.to_bits()) {
                    errors.push(InputError {
                        message: format!(
                            "a baseline covariate differs within subject {id}: '{text}' here, another value on line {line}"
                        ),
                        ..at()
                    });
                }
            }
            _ => {
                first_lines.insert(ours.clone(), row.line);
                match sex {
                    Some(s) => cov.sex = Some(s),
                    None => cov.enter(ours, value, at().origin),
                }
            }
        }
    }
}

/// One note naming the columns not read, and a warning for a covariate whose unit is needed.
fn unread_columns(table: &Table, cols: &Columns, notices: &mut Notices) {
    let used = cols.used();
    let src = table.source.as_str();
    let mut unknown = Vec::new();
    for (i, h) in table.headers.iter().enumerate().filter(|(i, _)| !used.contains(i)) {
        let upper = h.to_ascii_uppercase();
        if let Some((_, ours)) = UNIT_NEEDED.iter().find(|(n, _)| *n == upper) {
            notices.warnings.push(format!(
                "{src}: column {h} is not read: ADPPK states no unit for it; name it with --map \
                 ({ours}, e.g. --map crcl_ml_min={h})"
            ));
        } else if !KNOWN_UNUSED.contains(&upper.as_str()) && !["AVALU", "AMT"].contains(&upper.as_str()) {
            unknown.push(table.headers[i].as_str());
        }
    }
    if !unknown.is_empty() {
        notices.notes.push(format!("{src}: columns not read: {}", unknown.join(", ")));
    }
}

impl Adppk {
    /// One line saying what the file holds: subjects, doses, levels (below the limit),
    /// covariates and analytes.
    pub fn summary(&self) -> String {
        let doses: usize = self.doses.subjects.iter().map(|(_, d)| d.len()).sum();
        let levels: Vec<&Level> = self.levels.subjects.iter().flat_map(|(_, l)| l).collect();
        let blq = levels.iter().filter(|l| l.is_blq()).count();
        let names: BTreeSet<&str> = self
            .covariates
            .iter()
            .flat_map(|(_, c)| c.iter().map(|(n, _)| n).chain(c.sex.map(|_| "sex")))
            .collect();
        let list = |items: Vec<&str>| if items.is_empty() { "none".to_string() } else { items.join(", ") };
        let analytes = match &self.labels.analyte {
            Some(a) if self.labels.analytes.len() > 1 => {
                format!("{} (read: {a})", self.labels.analytes.join(", "))
            }
            _ => list(self.labels.analytes.iter().map(String::as_str).collect()),
        };
        format!(
            "ADPPK file, {} subject(s), {doses} dose(s), {} level(s), {blq} below the limit; \
             covariates: {}; analytes: {analytes}",
            self.covariates.len(),
            levels.len(),
            list(names.into_iter().collect()),
        )
    }

    /// Write what was read in our own formats: the doses, levels and covariates files
    /// (docs/formats.md), base units, full precision.
    pub fn write_ours(
        &self,
        doses: &mut dyn std::io::Write,
        levels: &mut dyn std::io::Write,
        covariates: &mut dyn std::io::Write,
    ) -> std::io::Result<()> {
        let mut w = CsvWriter::new(doses);
        w.row(["subject", "time_h", "amount_mg", "route", "duration_h"])?;
        for (id, list) in &self.doses.subjects {
            for d in list {
                w.text(id.as_deref().unwrap_or(""))?;
                w.number(d.time_h)?;
                w.number(d.amount_mg)?;
                w.text(&d.route.to_string())?;
                if d.route == Route::Infusion {
                    w.number(d.duration_h)?
                } else {
                    w.text("")?
                }
                w.end_row()?;
            }
        }
        w.finish()?;
        let mut w = CsvWriter::new(levels);
        w.row(["subject", "time_h", "conc_mg_l", "lloq_mg_l"])?;
        for (id, list) in &self.levels.subjects {
            for l in list {
                w.text(id.as_deref().unwrap_or(""))?;
                w.number(l.time_h)?;
                match l.conc_mg_l {
                    Some(c) => w.number(c)?,
                    None => w.text("BLQ")?,
                }
                match l.lloq_mg_l {
                    Some(x) => w.number(x)?,
                    None => w.text("")?,
                }
                w.end_row()?;
            }
        }
        w.finish()?;
        let names: BTreeSet<&str> =
            self.covariates.iter().flat_map(|(_, c)| c.iter().map(|(n, _)| n)).collect();
        let with_sex = self.covariates.iter().any(|(_, c)| c.sex.is_some());
        let mut w = CsvWriter::new(covariates);
        let mut header = vec!["subject"];
        header.extend(names.iter().copied());
        if with_sex {
            header.push("sex");
        }
        w.row(&header)?;
        for (id, c) in &self.covariates {
            w.text(id)?;
            for n in &names {
                match c.get(n) {
                    Some(x) => w.number(x)?,
                    None => w.text("")?,
                }
            }
            if with_sex {
                w.text(match c.sex {
                    Some(crate::covariates::Sex::Male) => "M",
                    Some(crate::covariates::Sex::Female) => "F",
                    None => "",
                })?;
            }
            w.end_row()?;
        }
        w.finish().map(drop)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::Origin;

    fn read(text: &str, map: &[&str]) -> Result<Adppk, Vec<InputError>> {
        let options = AdppkOptions {
            analyte: None,
            map: map
                .iter()
                .map(|m| Stated { value: m.to_string(), origin: Origin::Flag("--map".into()) })
                .collect(),
        };
        parse_adppk(&Table::parse("a.csv", text.as_bytes())?, &options)
    }

    #[test]
    fn doses_levels_and_covariates() {
        let f = read(
            "STUDYID,USUBJID,EVID,MDV,AFRLT,AMT,RATE,ROUTE,AVAL,AVALU,BLQFL,ALLOQ,WTBL,SEX,XYZ\n\
             S,1,1,1,0,500,250,INTRAVENOUS,,,,,70,F,a\n\
             S,1,0,0,1,,,,1500,ng/mL,N,100,70,F,b\n\
             S,1,0,0,3,,,,,ng/mL,Y,100,70,F,c\n\
             S,1,0,1,4,,,,,ng/mL,,,70,F,d\n",
            &["amount_mg=AMT"],
        )
        .unwrap();
        let d = &f.doses.subjects[0].1[0];
        assert_eq!((d.route, d.duration_h, d.amount_mg), (Route::Infusion, 2.0, 500.0));
        let l = &f.levels.subjects[0].1;
        assert_eq!(l.len(), 2);
        assert!((l[0].conc_mg_l.unwrap() - 1.5).abs() < 1e-15);
        assert!(l[1].is_blq() && (l[1].lloq_mg_l.unwrap() - 0.1).abs() < 1e-15);
        let c = &f.covariates[0].1;
        assert_eq!((c.get("weight_kg"), c.sex), (Some(70.0), Some(crate::covariates::Sex::Female)));
        assert_eq!(f.labels.conc_unit.as_deref(), Some("ng/mL"));
        assert_eq!(f.notices.notes, ["a.csv: MDV 1, not used: line 5", "a.csv: columns not read: XYZ"]);
    }

    #[test]
    fn the_amount_needs_a_stated_unit() {
        let e = read("USUBJID,EVID,AFRLT,AMT,ROUTE\n1,1,0,5,ORAL\n", &[]).unwrap_err();
        assert_eq!(e[0].place(), Some("AMT"));
        assert!(e[0].message.contains("--map amount_mg=AMT"), "{e:?}");
    }
}
