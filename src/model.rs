//! The population model file (TOML, our own format): typical values, between-subject
//! variability, covariate effects, an optional CL–V correlation, absorption, residual error,
//! and plausible ranges that trigger warnings.
//!
//! Each individual parameter is log-normal around its typical value:
//! ln P = ln P_typ(covariates) + η, η ~ N(0, ω²), ω² = ln(1 + CV²).

use crate::covariates::Covariates;
use crate::error::InputError;
use crate::io::tomlfile::TomlText;
use crate::limits;
use crate::units::Kind;
use serde::Deserialize;
use toml::Spanned;

/// How a covariate scales a typical value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Form {
    /// P_typ · (x / reference)^effect
    Power,
    /// P_typ · (1 + effect · (x − reference))
    Linear,
    /// P_typ · exp(effect · (x − reference))
    Exponential,
}

/// One covariate effect on one parameter.
#[derive(Debug, Clone, PartialEq)]
pub struct CovariateEffect {
    /// Covariate column name (`crcl_ml_min`, `weight_kg`).
    pub covariate: String,
    /// Functional form.
    pub form: Form,
    /// Reference value at which the effect is 1.
    pub reference: f64,
    /// Exponent or slope.
    pub effect: f64,
}

impl CovariateEffect {
    /// The multiplier on the typical value for covariate value `x`.
    pub fn factor(&self, x: f64) -> f64 {
        match self.form {
            Form::Power => (x / self.reference).powf(self.effect),
            Form::Linear => 1.0 + self.effect * (x - self.reference),
            Form::Exponential => (self.effect * (x - self.reference)).exp(),
        }
    }
}

/// A log-normal individual parameter.
#[derive(Debug, Clone, PartialEq)]
pub struct Parameter {
    /// Typical value at the covariates' reference values (base units).
    pub typical: f64,
    /// Between-subject variability as a coefficient of variation (0 = fixed).
    pub bsv_cv: f64,
    /// Variance of ln P between subjects, ln(1 + CV²).
    pub omega2: f64,
    /// Covariate effects, applied multiplicatively.
    pub covariates: Vec<CovariateEffect>,
    /// Values outside this range draw a warning.
    pub plausible: Option<(f64, f64)>,
}

impl Parameter {
    /// The typical value for a subject's covariates. Errors are reported where the covariate
    /// was entered ([`Covariates::origin`]).
    pub fn typical_for(&self, covariates: &Covariates) -> Result<f64, InputError> {
        let mut value = self.typical;
        for effect in &self.covariates {
            let name = &effect.covariate;
            let x = covariates.get(name).ok_or_else(|| {
                InputError::field(name.as_str(), format!("the model needs the covariate '{name}'"))
            })?;
            let factor = effect.factor(x);
            if !(factor.is_finite() && factor > 0.0) {
                let gives = if factor.is_finite() {
                    "a typical value of zero or less"
                } else {
                    "an infinite typical value"
                };
                return Err(InputError::at(
                    covariates.origin(name),
                    format!(
                        "{name} = {x} gives {gives} through the model's covariate effect; check the value or the model"
                    ),
                ));
            }
            value *= factor;
        }
        Ok(value)
    }

    /// Whether the parameter varies between subjects (is estimated).
    pub fn varies(&self) -> bool {
        self.omega2 > 0.0
    }
}

/// Oral absorption.
#[derive(Debug, Clone, PartialEq)]
pub struct Absorption {
    /// Absorption rate constant (1/h).
    pub ka: Parameter,
    /// Bioavailability, fixed.
    pub f: f64,
    /// Lag time (h), fixed.
    pub tlag_h: f64,
}

/// Residual error: σ² = additive² + (proportional · f)².
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Residual {
    /// Additive standard deviation (mg/L).
    pub additive_mg_l: f64,
    /// Proportional coefficient of variation.
    pub proportional_cv: f64,
}

impl Residual {
    /// Residual variance at prediction `f`.
    pub fn variance(&self, f: f64) -> f64 {
        self.additive_mg_l.powi(2) + (self.proportional_cv * f).powi(2)
    }
}

/// A validated population model.
#[derive(Debug, Clone, PartialEq)]
pub struct PopulationModel {
    /// The drug's name, for reports.
    pub drug: Option<String>,
    /// Clearance (L/h).
    pub clearance: Parameter,
    /// Volume (L).
    pub volume: Parameter,
    /// Correlation between η_CL and η_V.
    pub correlation_cl_v: f64,
    /// Absorption, for oral drugs.
    pub absorption: Option<Absorption>,
    /// Residual error model.
    pub residual: Residual,
    /// Warnings reading the file drew: values outside the plausible limits of their quantity
    /// ([`limits::implausible`]), each at its key and line; read as written.
    pub warnings: Vec<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    drug: Option<RawDrug>,
    clearance: RawClearance,
    volume: RawVolume,
    absorption: Option<RawAbsorption>,
    correlation: Option<RawCorrelation>,
    residual: RawResidual,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawDrug {
    name: Option<String>,
    /// Accepted for the reader's benefit; not used in computation.
    #[serde(rename = "note")]
    _note: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawClearance {
    typical_l_h: Spanned<f64>,
    bsv_cv: Spanned<f64>,
    plausible_l_h: Option<Spanned<[f64; 2]>>,
    #[serde(default)]
    covariates: Vec<RawCovariate>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawVolume {
    typical_l: Spanned<f64>,
    bsv_cv: Spanned<f64>,
    plausible_l: Option<Spanned<[f64; 2]>>,
    #[serde(default)]
    covariates: Vec<RawCovariate>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawAbsorption {
    typical_ka_per_h: Spanned<f64>,
    #[serde(default)]
    bsv_cv: Option<Spanned<f64>>,
    plausible_ka_per_h: Option<Spanned<[f64; 2]>>,
    f: Option<Spanned<f64>>,
    tlag_h: Option<Spanned<f64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCorrelation {
    cl_v: Spanned<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawResidual {
    additive_mg_l: Spanned<f64>,
    proportional_cv: Spanned<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCovariate {
    covariate: Spanned<String>,
    form: Spanned<String>,
    reference: Spanned<f64>,
    effect: Spanned<f64>,
}

/// Collects located problems while validating one file.
struct Checker<'a> {
    text: &'a TomlText,
    errors: Vec<InputError>,
    warnings: Vec<String>,
}

impl Checker<'_> {
    fn require(&mut self, ok: bool, value: &Spanned<impl Sized>, key: &str, message: &str) {
        if !ok {
            self.errors.push(self.text.error_at(value.span(), key, message));
        }
    }

    /// A positive value within the limits of its kind (a covariate's limits when `kind` is
    /// `None`).
    fn positive(&mut self, v: &Spanned<f64>, key: &str, kind: Option<Kind>) -> f64 {
        let x = *v.get_ref();
        let checked = if !(x.is_finite() && x > 0.0) {
            Err(format!("expected a positive number, found {}", limits::number(x)))
        } else {
            match kind {
                Some(kind) => limits::check(kind, x).map(drop),
                None => limits::check_range(&limits::COVARIATE, x, "a covariate reference", "").map(drop),
            }
        };
        if let (Ok(()), Some(kind)) = (&checked, kind) {
            self.plausible(kind, v, key);
        }
        self.within(checked, v, key);
        x
    }

    /// A warning at the value's key when it lies outside the plausible limits of `kind`.
    fn plausible(&mut self, kind: Kind, v: &Spanned<f64>, key: &str) {
        if let Some(unusual) = limits::implausible(kind, *v.get_ref()) {
            let unit = limits::unit_text(kind);
            let at = self.text.error_at(
                v.span(),
                key,
                format!("{unusual} (read in {unit}, the unit in the key's name)"),
            );
            self.warnings.push(at.to_string());
        }
    }

    /// Record a failed limit check at the value's key.
    fn within(&mut self, checked: Result<(), String>, value: &Spanned<f64>, key: &str) {
        if let Err(m) = checked {
            self.errors.push(self.text.error_at(value.span(), key, m));
        }
    }

    fn cv(&mut self, v: &Spanned<f64>, key: &str, allow_zero: bool) -> f64 {
        let x = *v.get_ref();
        let ok = x.is_finite() && (x > 0.0 || (allow_zero && x >= 0.0)) && x <= 10.0;
        let bound = if allow_zero { "0 to 10" } else { "above 0 and at most 10" };
        self.require(
            ok,
            v,
            key,
            &format!("expected a coefficient of variation {bound} (0.3 means 30 %), found {x}"),
        );
        x
    }

    fn range(&mut self, v: &Option<Spanned<[f64; 2]>>, key: &str) -> Option<(f64, f64)> {
        let v = v.as_ref()?;
        let [lo, hi] = *v.get_ref();
        let ok = lo.is_finite() && hi.is_finite() && 0.0 <= lo && lo < hi;
        self.require(ok, v, key, &format!("expected [low, high] with 0 <= low < high, found [{lo}, {hi}]"));
        Some((lo, hi))
    }

    fn covariates(&mut self, raw: &[RawCovariate], table: &str) -> Vec<CovariateEffect> {
        raw.iter()
            .filter_map(|c| {
                let form = match c.form.get_ref().as_str() {
                    "power" => Some(Form::Power),
                    "linear" => Some(Form::Linear),
                    "exponential" => Some(Form::Exponential),
                    other => {
                        self.errors.push(self.text.error_at(
                            c.form.span(),
                            &format!("{table}.covariates.form"),
                            format!("expected power, linear or exponential, found '{other}'"),
                        ));
                        None
                    }
                }?;
                let reference = *c.reference.get_ref();
                let key = format!("{table}.covariates.reference");
                if form == Form::Power {
                    self.positive(&c.reference, &key, None);
                } else {
                    self.require(reference.is_finite(), &c.reference, &key, "expected a finite number");
                }
                let effect = *c.effect.get_ref();
                self.require(
                    effect.is_finite(),
                    &c.effect,
                    &format!("{table}.covariates.effect"),
                    "expected a finite number",
                );
                let name = c.covariate.get_ref().trim().to_string();
                self.require(
                    !name.is_empty(),
                    &c.covariate,
                    &format!("{table}.covariates.covariate"),
                    "expected a covariate column name",
                );
                Some(CovariateEffect { covariate: name, form, reference, effect })
            })
            .collect()
    }
}

fn omega2(cv: f64) -> f64 {
    (cv * cv).ln_1p()
}

impl PopulationModel {
    /// Parse and validate a model file's text, reporting every problem found.
    pub fn parse(text: &TomlText) -> Result<PopulationModel, Vec<InputError>> {
        let raw: RawModel = text.parse().map_err(|e| vec![e])?;
        let mut c = Checker { text, errors: Vec::new(), warnings: Vec::new() };
        let cl_cv = c.cv(&raw.clearance.bsv_cv, "clearance.bsv_cv", false);
        let clearance = Parameter {
            typical: c.positive(&raw.clearance.typical_l_h, "clearance.typical_l_h", Some(Kind::Clearance)),
            bsv_cv: cl_cv,
            omega2: omega2(cl_cv),
            covariates: c.covariates(&raw.clearance.covariates, "clearance"),
            plausible: c.range(&raw.clearance.plausible_l_h, "clearance.plausible_l_h"),
        };
        let v_cv = c.cv(&raw.volume.bsv_cv, "volume.bsv_cv", false);
        let volume = Parameter {
            typical: c.positive(&raw.volume.typical_l, "volume.typical_l", Some(Kind::Volume)),
            bsv_cv: v_cv,
            omega2: omega2(v_cv),
            covariates: c.covariates(&raw.volume.covariates, "volume"),
            plausible: c.range(&raw.volume.plausible_l, "volume.plausible_l"),
        };
        let absorption = raw.absorption.as_ref().map(|a| {
            let cv = a.bsv_cv.as_ref().map_or(0.0, |v| c.cv(v, "absorption.bsv_cv", true));
            let f = a.f.as_ref().map_or(1.0, |f| {
                let x = *f.get_ref();
                c.require(
                    x > 0.0 && x <= 1.0,
                    f,
                    "absorption.f",
                    &format!("expected a bioavailability in (0, 1], found {x}"),
                );
                x
            });
            let tlag_h = a.tlag_h.as_ref().map_or(0.0, |t| {
                let x = *t.get_ref();
                c.require(
                    x.is_finite() && x >= 0.0,
                    t,
                    "absorption.tlag_h",
                    &format!("expected a lag time >= 0, found {}", limits::number(x)),
                );
                c.within(limits::check(Kind::Time, x).map(drop), t, "absorption.tlag_h");
                c.plausible(Kind::Time, t, "absorption.tlag_h");
                x
            });
            Absorption {
                ka: Parameter {
                    typical: c.positive(
                        &a.typical_ka_per_h,
                        "absorption.typical_ka_per_h",
                        Some(Kind::RateConstant),
                    ),
                    bsv_cv: cv,
                    omega2: omega2(cv),
                    covariates: Vec::new(),
                    plausible: c.range(&a.plausible_ka_per_h, "absorption.plausible_ka_per_h"),
                },
                f,
                tlag_h,
            }
        });
        let correlation_cl_v = raw.correlation.as_ref().map_or(0.0, |r| {
            let x = *r.cl_v.get_ref();
            c.require(
                x.abs() < 1.0,
                &r.cl_v,
                "correlation.cl_v",
                &format!("expected a correlation strictly between -1 and 1, found {x}"),
            );
            x
        });
        let additive = *raw.residual.additive_mg_l.get_ref();
        let proportional = *raw.residual.proportional_cv.get_ref();
        c.require(
            additive.is_finite() && additive >= 0.0,
            &raw.residual.additive_mg_l,
            "residual.additive_mg_l",
            "expected a standard deviation >= 0",
        );
        c.within(
            limits::check(Kind::Concentration, additive).map(drop),
            &raw.residual.additive_mg_l,
            "residual.additive_mg_l",
        );
        c.require(
            proportional.is_finite() && proportional >= 0.0,
            &raw.residual.proportional_cv,
            "residual.proportional_cv",
            "expected a coefficient of variation >= 0",
        );
        c.require(
            additive > 0.0 || proportional > 0.0,
            &raw.residual.additive_mg_l,
            "residual",
            "the residual error cannot be zero: give additive_mg_l or proportional_cv above 0",
        );
        if !c.errors.is_empty() {
            return Err(c.errors);
        }
        Ok(PopulationModel {
            drug: raw.drug.and_then(|d| d.name),
            clearance,
            volume,
            correlation_cl_v,
            absorption,
            residual: Residual { additive_mg_l: additive, proportional_cv: proportional },
            warnings: c.warnings,
        })
    }

    /// Read and validate a model file.
    pub fn read(path: &str) -> Result<PopulationModel, Vec<InputError>> {
        PopulationModel::parse(&TomlText::read(path).map_err(|e| vec![e])?)
    }

    /// Typical clearance and volume for one set of covariates.
    pub fn typical_cl_v(&self, covariates: &Covariates) -> Result<(f64, f64), InputError> {
        Ok((self.clearance.typical_for(covariates)?, self.volume.typical_for(covariates)?))
    }

    /// Every covariate the model uses.
    pub fn covariates_needed(&self) -> Vec<&str> {
        let mut names: Vec<&str> = self
            .clearance
            .covariates
            .iter()
            .chain(&self.volume.covariates)
            .map(|c| c.covariate.as_str())
            .collect();
        names.sort_unstable();
        names.dedup();
        names
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const EXAMPLE: &str = "
[clearance]
typical_l_h = 4.0
bsv_cv = 0.30
[[clearance.covariates]]
covariate = \"crcl_ml_min\"
form = \"power\"
reference = 100.0
effect = 0.75
[volume]
typical_l = 50.0
bsv_cv = 0.25
[residual]
additive_mg_l = 0.5
proportional_cv = 0.10
";

    #[test]
    fn the_issue_example_parses_with_omega_from_cv() {
        let m = PopulationModel::parse(&TomlText::new("m.toml", EXAMPLE)).unwrap();
        assert!((m.clearance.omega2 - (1.0f64 + 0.09).ln()).abs() < 1e-15);
        let mut cov = Covariates::default();
        cov.set("crcl_ml_min", 50.0);
        let typ = m.clearance.typical_for(&cov).unwrap();
        assert!((typ - 4.0 * 0.5f64.powf(0.75)).abs() < 1e-12);
        assert!(m.clearance.typical_for(&Covariates::default()).unwrap_err().message.contains("crcl_ml_min"));
    }

    #[test]
    fn problems_are_located() {
        let bad = EXAMPLE.replace("bsv_cv = 0.25", "bsv_cv = -1").replace("\"power\"", "\"cubic\"");
        let e = PopulationModel::parse(&TomlText::new("m.toml", &bad)).unwrap_err();
        assert_eq!(e.len(), 2, "{e:?}");
        assert_eq!(e[0].line(), Some(7));
        assert_eq!(e[1].line(), Some(12));
        let unknown = EXAMPLE.replace("bsv_cv = 0.30", "bsv_cv = 0.30\nspread = 2");
        let e = PopulationModel::parse(&TomlText::new("m.toml", &unknown)).unwrap_err();
        assert!(e[0].message.contains("spread") && e[0].line() == Some(5), "{e:?}");
    }
}
