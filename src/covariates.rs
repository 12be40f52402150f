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

use crate::error::InputError;
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

    /// Set a covariate.
    pub fn set(&mut self, name: &str, value: f64) {
        self.values.insert(name.to_string(), value);
    }

    /// Take every value `other` has (numbers and sex) over this one's.
    pub(crate) fn overlay(&mut self, other: &Covariates) {
        for (k, v) in other.iter() {
            self.set(k, v);
        }
        if other.sex.is_some() {
            self.sex = other.sex;
        }
    }

    /// All numeric covariates in name order.
    pub fn iter(&self) -> impl Iterator<Item = (&str, f64)> {
        self.values.iter().map(|(k, v)| (k.as_str(), *v))
    }

    /// Derive `crcl_ml_min`, `bsa_m2` and `ibw_kg` where asked for and computable, recording how.
    /// Returns what is missing for a requested covariate that cannot be derived.
    pub fn derive(&mut self, wanted: &[&str]) -> Result<(), String> {
        if self.get("scr_mg_dl").is_none()
            && let Some(umol) = self.get("scr_umol_l")
        {
            self.set("scr_mg_dl", umol / 88.4);
        }
        for &name in wanted {
            if self.get(name).is_some() {
                continue;
            }
            let missing = |what: &[(&str, bool)]| {
                let absent: Vec<&str> = what.iter().filter(|(_, have)| !have).map(|(n, _)| *n).collect();
                format!("'{name}' is not given, and deriving it needs {} too", absent.join(", "))
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
                    self.set(name, cockcroft_gault(age, weight, scr, sex));
                    self.derivations
                        .push("crcl_ml_min by Cockcroft–Gault (1976) with total body weight".to_string());
                }
                "bsa_m2" => {
                    let (Some(w), Some(h)) = (self.get("weight_kg"), self.get("height_cm")) else {
                        return Err(missing(&[
                            ("weight_kg", has("weight_kg")),
                            ("height_cm", has("height_cm")),
                        ]));
                    };
                    self.set(name, bsa_du_bois(w, h));
                    self.derivations.push("bsa_m2 by Du Bois & Du Bois (1916)".to_string());
                }
                "ibw_kg" => {
                    let (Some(h), Some(sex)) = (self.get("height_cm"), self.sex) else {
                        return Err(missing(&[("height_cm", has("height_cm")), ("sex", self.sex.is_some())]));
                    };
                    self.set(name, ideal_body_weight(h, sex));
                    self.derivations.push(if h < 152.4 {
                        "ibw_kg by Devine (1974), extrapolated below 5 ft (152.4 cm), where the formula was not meant to apply".to_string()
                    } else {
                        "ibw_kg by Devine (1974)".to_string()
                    });
                }
                _ => return Err(format!("the covariate '{name}' is not given")),
            }
        }
        Ok(())
    }
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

/// Read one `NAME=VALUE` covariate (`weight_kg=70`, `sex=F`) into `cov`.
pub(crate) fn parse_assignment(cov: &mut Covariates, item: &str) -> Result<(), String> {
    let Some((name, value)) = item.split_once('=') else {
        return Err(format!("expected NAME=VALUE, found '{item}'"));
    };
    let (name, value) = (name.trim(), value.trim());
    if name == "sex" {
        cov.sex = Some(match value.to_ascii_uppercase().as_str() {
            "M" | "MALE" => Sex::Male,
            "F" | "FEMALE" => Sex::Female,
            _ => return Err(format!("sex must be M or F, found '{value}'")),
        });
        return Ok(());
    }
    match value.parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => {
            cov.set(name, covariate_value(name, v)?);
            Ok(())
        }
        Ok(v) if v.is_finite() => Err(format!("{name} must not be negative, found {v}")),
        _ => Err(format!("expected a number, found '{value}'")),
    }
}

/// Read a covariates table: a `subject` column and numeric columns; `sex` as M/F.
/// Returns subjects in file order.
pub fn parse_covariates(table: &Table) -> Result<Vec<(String, Covariates)>, Vec<InputError>> {
    let src = table.source.as_str();
    let Some(subject) = table.column("subject") else {
        return Err(vec![InputError::in_file(src, "missing the subject column").at_line(table.header_line)]);
    };
    let mut errors = Vec::new();
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
        for (i, name) in table.headers.iter().enumerate() {
            let text = row.fields[i].as_str();
            if i == subject.index || text.is_empty() {
                continue;
            }
            if name == "sex" {
                match text.to_ascii_uppercase().as_str() {
                    "M" | "MALE" => cov.sex = Some(Sex::Male),
                    "F" | "FEMALE" => cov.sex = Some(Sex::Female),
                    _ => errors.push(
                        InputError::in_file(src, format!("expected M or F, found '{text}'"))
                            .at_line(row.line)
                            .in_column("sex"),
                    ),
                }
                continue;
            }
            match text.parse::<f64>() {
                Ok(v) if v.is_finite() && v >= 0.0 => match covariate_value(name, v) {
                    Ok(v) => cov.set(name, v),
                    Err(m) => {
                        errors.push(InputError::in_file(src, m).at_line(row.line).in_column(name.clone()))
                    }
                },
                _ => errors.push(
                    InputError::in_file(src, format!("expected a non-negative number, found '{text}'"))
                        .at_line(row.line)
                        .in_column(name.clone()),
                ),
            }
        }
        out.push((id, cov));
    }
    if errors.is_empty() { Ok(out) } else { Err(errors) }
}
