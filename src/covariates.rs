//! Subject covariates and the published formulas that derive others from them.
//!
//! - Creatinine clearance, Cockcroft DW, Gault MH. Nephron 1976;16:31–41:
//!   CrCl (mL/min) = (140 − age)·weight / (72·SCr[mg/dL]), × 0.85 for women. The weight is
//!   total body weight, as in the original paper; SCr in µmol/L is divided by 88.4.
//! - Body surface area, Du Bois D, Du Bois EF. Arch Intern Med 1916;17:863–871:
//!   BSA (m²) = 0.007184 · weight^0.425 · height^0.725 (kg, cm).
//! - Ideal body weight, Devine BJ. Drug Intell Clin Pharm 1974;8:650–655:
//!   50 kg (men) or 45.5 kg (women) + 2.3 kg per inch of height over 5 feet.
//!
//! (The Devine citation is recalled from memory: its journal details could not be confirmed.)

use crate::error::{InputError, Origin};
use crate::io::table::Table;
use std::collections::BTreeMap;

/// Sex, as the published formulas use it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sex {
    /// Male.
    Male,
    /// Female.
    Female,
}

/// One subject's covariates: named numbers (`weight_kg`, `age_y`, `crcl_ml_min`) and sex.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Covariates {
    values: BTreeMap<String, f64>,
    /// Where each value was entered (a file's line and column, or a flag), so that a problem
    /// found with it later, in a derivation or in the model, points at what the user wrote.
    origins: BTreeMap<String, Origin>,
    /// Sex, when given.
    pub sex: Option<Sex>,
    /// How each derived covariate was obtained, for reports.
    pub derivations: Vec<String>,
}

impl Covariates {
    /// A covariate's value.
    pub fn get(&self, name: &str) -> Option<f64> {
        self.values.get(name).copied()
    }

    /// Set a covariate (computed here, or given through the library).
    pub fn set(&mut self, name: &str, value: f64) {
        self.values.insert(name.to_string(), value);
        self.origins.remove(name);
    }

    /// Set a covariate the user entered at `origin`.
    pub fn enter(&mut self, name: &str, value: f64, origin: Origin) {
        self.values.insert(name.to_string(), value);
        self.origins.insert(name.to_string(), origin);
    }

    /// Where a covariate was entered; a value computed or given through the library is
    /// reported against its name ([`Origin::Field`]), for the caller to locate.
    pub fn origin(&self, name: &str) -> Origin {
        self.origins.get(name).cloned().unwrap_or_else(|| Origin::Field(name.to_string()))
    }

    /// Take every value `other` has (numbers and sex, with where they were entered) over this
    /// one's.
    pub(crate) fn overlay(&mut self, other: &Covariates) {
        for (k, v) in other.iter() {
            self.values.insert(k.to_string(), v);
            match other.origins.get(k) {
                Some(o) => self.origins.insert(k.to_string(), o.clone()),
                None => self.origins.remove(k),
            };
        }
        if other.sex.is_some() {
            self.sex = other.sex;
        }
    }

    /// Keep a derived covariate when it is a positive number; else the problem, at the input
    /// that made it so: the first of `inputs` that is zero (a divisor or a factor), or else the
    /// first of them.
    fn derived(&mut self, name: &str, value: f64, inputs: &[&str], how: &str) -> Result<(), InputError> {
        if value.is_finite() && value > 0.0 {
            self.set(name, value);
            self.derivations.push(format!("{name} by {how}"));
            return Ok(());
        }
        let culprit = inputs.iter().find(|n| self.get(n) == Some(0.0)).unwrap_or(&inputs[0]);
        let entered = self.get(culprit).unwrap_or(f64::NAN);
        let gives =
            if value.is_finite() { format!("{name} = {value}") } else { format!("an infinite {name}") };
        Err(InputError::at(
            self.origin(culprit),
            format!("{culprit} = {entered} gives {gives} by {how}; expected a positive {name}"),
        ))
    }

    /// The covariates the user entered, with where: those computed or given through the
    /// library are left out.
    pub fn entered(&self) -> impl Iterator<Item = (&str, f64, &Origin)> {
        self.origins.iter().filter_map(|(k, o)| Some((k.as_str(), self.get(k)?, o)))
    }

    /// All numeric covariates in name order.
    pub fn iter(&self) -> impl Iterator<Item = (&str, f64)> {
        self.values.iter().map(|(k, v)| (k.as_str(), *v))
    }

    /// Derive `crcl_ml_min`, `bsa_m2` and `ibw_kg` where asked for and computable, recording how.
    ///
    /// Errors: a requested covariate that is missing and cannot be derived (reported against
    /// its name, for the caller to locate), or a derivation that gives no positive number
    /// (reported where the value at fault was entered).
    pub fn derive(&mut self, wanted: &[&str]) -> Result<(), InputError> {
        if self.get("scr_mg_dl").is_none()
            && let Some(umol) = self.get("scr_umol_l")
        {
            self.enter("scr_mg_dl", umol / 88.4, self.origin("scr_umol_l"));
        }
        for &name in wanted {
            if self.get(name).is_some() {
                continue;
            }
            let missing = |what: &[(&str, bool)]| {
                let absent: Vec<&str> = what.iter().filter(|(_, have)| !have).map(|(n, _)| *n).collect();
                InputError::field(
                    name,
                    format!("'{name}' is not given, and deriving it needs {} too", absent.join(", ")),
                )
            };
            let has = |n: &str| self.get(n).is_some();
            match name {
                "crcl_ml_min" => {
                    let (Some(age), Some(weight), Some(scr), Some(sex)) =
                        (self.get("age_y"), self.get("weight_kg"), self.get("scr_mg_dl"), self.sex)
                    else {
                        return Err(missing(&[
                            ("age_y", has("age_y")),
                            ("weight_kg", has("weight_kg")),
                            ("sex", self.sex.is_some()),
                            ("scr_mg_dl (or scr_umol_l)", has("scr_mg_dl")),
                        ]));
                    };
                    self.derived(
                        name,
                        cockcroft_gault(age, weight, scr, sex),
                        &["age_y", "weight_kg", "scr_mg_dl"],
                        "Cockcroft–Gault (1976) with total body weight",
                    )?;
                }
                "bsa_m2" => {
                    let (Some(w), Some(h)) = (self.get("weight_kg"), self.get("height_cm")) else {
                        return Err(missing(&[
                            ("weight_kg", has("weight_kg")),
                            ("height_cm", has("height_cm")),
                        ]));
                    };
                    self.derived(
                        name,
                        bsa_du_bois(w, h),
                        &["height_cm", "weight_kg"],
                        "Du Bois & Du Bois (1916)",
                    )?;
                }
                "ibw_kg" => {
                    let (Some(h), Some(sex)) = (self.get("height_cm"), self.sex) else {
                        return Err(missing(&[("height_cm", has("height_cm")), ("sex", self.sex.is_some())]));
                    };
                    let how = if h < 152.4 {
                        "Devine (1974), extrapolated below 5 ft (152.4 cm), where the formula was not meant to apply"
                    } else {
                        "Devine (1974)"
                    };
                    self.derived(name, ideal_body_weight(h, sex), &["height_cm"], how)?;
                }
                _ => return Err(InputError::field(name, format!("the covariate '{name}' is not given"))),
            }
        }
        Ok(())
    }
}

/// One warning per covariate column (or flag) whose entered values lie outside the plausible
/// range of the covariate ([`crate::limits::implausible_covariate`]), naming the file, column
/// and lines (the first few), or the flag; each place counted once however many subjects share
/// it (a value given for all subjects).
pub fn unusual<'a>(all: impl IntoIterator<Item = &'a Covariates>) -> Vec<String> {
    // (where: the file and column, or the flag; the covariate) → (lines, the first warning).
    let mut groups: Vec<((String, &str), Vec<u64>, String)> = Vec::new();
    let mut seen = std::collections::HashSet::new();
    for cov in all {
        for (name, value, origin) in cov.entered() {
            let Some(warning) = crate::limits::implausible_covariate(name, value) else { continue };
            if !seen.insert((origin.clone(), name)) {
                continue;
            }
            let (place, line) = match origin {
                Origin::File { path, line, place: Some(crate::error::Place::Column(c)) } => {
                    (format!("{path}: column {c}"), *line)
                }
                other => (other.to_string(), None),
            };
            match groups.iter_mut().find(|g| g.0 == (place.clone(), name)) {
                Some(g) => g.1.extend(line),
                None => groups.push(((place, name), line.into_iter().collect(), warning)),
            }
        }
    }
    groups
        .into_iter()
        .map(|((place, _), mut lines, first)| {
            lines.sort_unstable();
            match lines.len() {
                0 => format!("{place}: {first}"),
                1 => format!("{place}, {}: {first}", crate::error::lines_phrase(&lines)),
                _ => format!("{place}, {}: for one, {first}", crate::error::lines_phrase(&lines)),
            }
        })
        .collect()
}

/// Creatinine clearance (mL/min) by Cockcroft–Gault; serum creatinine in mg/dL.
pub fn cockcroft_gault(age_y: f64, weight_kg: f64, scr_mg_dl: f64, sex: Sex) -> f64 {
    let male = (140.0 - age_y) * weight_kg / (72.0 * scr_mg_dl);
    match sex {
        Sex::Male => male,
        Sex::Female => 0.85 * male,
    }
}

/// Body surface area (m²) by Du Bois & Du Bois.
pub fn bsa_du_bois(weight_kg: f64, height_cm: f64) -> f64 {
    0.007184 * weight_kg.powf(0.425) * height_cm.powf(0.725)
}

/// Ideal body weight (kg) by Devine.
pub fn ideal_body_weight(height_cm: f64, sex: Sex) -> f64 {
    let base = match sex {
        Sex::Male => 50.0,
        Sex::Female => 45.5,
    };
    base + 2.3 * (height_cm / 2.54 - 60.0)
}

/// A covariate's value checked against the covariate limits ([`crate::limits::COVARIATE`]).
fn covariate_value(name: &str, v: f64) -> Result<f64, String> {
    crate::limits::check_range(&crate::limits::COVARIATE, v, &format!("the covariate {name}"), "")
}

/// Whether `name` can name a covariate: letters, digits and `_`, starting with a letter
/// (`weight_kg`, `crcl_ml_min`), as the model file's covariate names are.
pub(crate) fn is_name(name: &str) -> bool {
    name.starts_with(|c: char| c.is_ascii_alphabetic())
        && name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_')
}

/// The sex written `text` (M, F, male, female, in any case).
pub(crate) fn parse_sex(text: &str) -> Result<Sex, String> {
    match text.to_ascii_uppercase().as_str() {
        "M" | "MALE" => Ok(Sex::Male),
        "F" | "FEMALE" => Ok(Sex::Female),
        _ => Err(format!("expected M or F, found '{text}'")),
    }
}

/// A covariate's value: a finite, non-negative number.
pub(crate) fn parse_covariate_value(name: &str, text: &str) -> Result<f64, String> {
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => covariate_value(name, v),
        _ => Err(format!("expected a non-negative number for {name}, found '{text}'")),
    }
}

/// Read one `NAME=VALUE` covariate (`weight_kg=70`, `sex=F`) entered at `origin` into `cov`.
pub(crate) fn parse_assignment(cov: &mut Covariates, item: &str, origin: &Origin) -> Result<(), String> {
    let Some((name, value)) = item.split_once('=') else {
        return Err(format!("expected NAME=VALUE, found '{item}'"));
    };
    let (name, value) = (name.trim().to_ascii_lowercase(), value.trim());
    if !is_name(&name) {
        return Err(format!(
            "expected NAME=VALUE with a covariate name such as weight_kg (letters, digits and _), found '{item}'"
        ));
    }
    if name == "sex" {
        cov.sex = Some(parse_sex(value)?);
    } else {
        cov.enter(&name, parse_covariate_value(&name, value)?, origin.clone());
    }
    Ok(())
}

/// Read a covariates table: a `subject` column and numeric columns (names in any case);
/// `sex` as M/F. Each value remembers its line and column. Returns subjects in file order.
pub fn parse_covariates(table: &Table) -> Result<Vec<(String, Covariates)>, Vec<InputError>> {
    let src = table.source.as_str();
    let subject = match table.subject_column() {
        Ok(Some(c)) => c,
        Ok(None) => {
            return Err(vec![
                InputError::in_file(src, "missing the subject column").at_line(table.header_line),
            ]);
        }
        Err(e) => return Err(vec![e]),
    };
    let names: Vec<String> = table.headers.iter().map(|h| h.to_ascii_lowercase()).collect();
    let mut errors = Vec::new();
    for (i, name) in names.iter().enumerate() {
        if i != subject.index && !is_name(name) {
            errors.push(
                InputError::in_file(
                    src,
                    format!(
                        "'{}' cannot name a covariate: use letters, digits and _ (e.g. weight_kg)",
                        table.headers[i]
                    ),
                )
                .at_line(table.header_line)
                .in_column(table.headers[i].clone()),
            );
        }
    }
    let mut out: Vec<(String, Covariates)> = Vec::new();
    let mut seen = std::collections::HashSet::new();
    for row in &table.rows {
        let id = row.text(&subject).to_string();
        if id.is_empty() {
            errors.push(row.error(src, Some(&subject), "expected a subject identifier"));
            continue;
        }
        if !seen.insert(id.clone()) {
            errors.push(row.error(src, Some(&subject), format!("subject '{id}' appears twice")));
            continue;
        }
        let mut cov = Covariates::default();
        for (i, name) in names.iter().enumerate() {
            let text = &row.fields[i];
            if i == subject.index || text.is_empty() {
                continue;
            }
            let at = || InputError::in_file(src, "").at_line(row.line).in_column(table.headers[i].clone());
            let parsed = if name == "sex" {
                parse_sex(text).map(|sex| cov.sex = Some(sex))
            } else {
                parse_covariate_value(name, text).map(|v| cov.enter(name, v, at().origin))
            };
            if let Err(message) = parsed {
                errors.push(InputError { message, ..at() });
            }
        }
        out.push((id, cov));
    }
    if errors.is_empty() { Ok(out) } else { Err(errors) }
}
