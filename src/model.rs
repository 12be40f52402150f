//! The population model file (TOML, our own format): typical values, between-subject
//! variability, covariate effects, correlations of the random effects, absorption, residual
//! error, plausible ranges that trigger warnings, and which values population estimation holds.
//!
//! Each individual parameter is log-normal around its typical value:
//! ln P = ln P_typ(covariates) + η, η ~ N(0, Ω), Ωⱼⱼ = ωⱼ² = ln(1 + CVⱼ²), Ωⱼₖ = ρⱼₖ·ωⱼ·ωₖ.

use crate::covariates::Covariates;
use crate::error::InputError;
use crate::fit::linalg::{MAX, Mat, cholesky};
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

impl Form {
    /// The name the model file uses.
    pub fn name(self) -> &'static str {
        match self {
            Form::Power => "power",
            Form::Linear => "linear",
            Form::Exponential => "exponential",
        }
    }
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

/// Correlations between the random effects of ln CL, ln V and ln ka. An absent one (`None`) is
/// 0 and population estimation leaves it out; a present one, even 0, is estimated.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Correlations {
    /// Correlation of η_CL and η_V.
    pub cl_v: Option<f64>,
    /// Correlation of η_CL and η_ka.
    pub cl_ka: Option<f64>,
    /// Correlation of η_V and η_ka.
    pub v_ka: Option<f64>,
}

impl Correlations {
    /// The correlation of random effects `i` and `j` (0 CL, 1 V, 2 ka).
    pub fn between(&self, i: usize, j: usize) -> Option<f64> {
        match (i.min(j), i.max(j)) {
            (0, 1) => self.cl_v,
            (0, 2) => self.cl_ka,
            (1, 2) => self.v_ka,
            _ => None,
        }
    }

    /// The slot of the correlation of random effects `i` and `j`.
    pub fn slot(&mut self, i: usize, j: usize) -> &mut Option<f64> {
        match (i.min(j), i.max(j)) {
            (0, 1) => &mut self.cl_v,
            (0, 2) => &mut self.cl_ka,
            _ => &mut self.v_ka,
        }
    }
}

/// The keys of the model file's values, as `[estimation] hold` names them.
pub const HOLDABLE: &[&str] = &[
    "clearance.typical_l_h",
    "clearance.bsv_cv",
    "volume.typical_l",
    "volume.bsv_cv",
    "absorption.typical_ka_per_h",
    "absorption.bsv_cv",
    "correlation.cl_v",
    "correlation.cl_ka",
    "correlation.v_ka",
    "residual.additive_mg_l",
    "residual.proportional_cv",
];

/// A validated population model.
#[derive(Debug, Clone, PartialEq)]
pub struct PopulationModel {
    /// The drug's name, for reports.
    pub drug: Option<String>,
    /// Clearance (L/h).
    pub clearance: Parameter,
    /// Volume (L).
    pub volume: Parameter,
    /// Correlations between the random effects.
    pub correlation: Correlations,
    /// Absorption, for oral drugs.
    pub absorption: Option<Absorption>,
    /// Residual error model.
    pub residual: Residual,
    /// Values population estimation holds at the file's value: keys of [`HOLDABLE`], or
    /// `clearance.covariates.NAME` / `volume.covariates.NAME` for a covariate effect.
    pub hold: Vec<String>,
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
    estimation: Option<RawEstimation>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawEstimation {
    #[serde(default)]
    hold: Vec<Spanned<String>>,
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
    cl_v: Option<Spanned<f64>>,
    cl_ka: Option<Spanned<f64>>,
    v_ka: Option<Spanned<f64>>,
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

impl Checker<'_> {
    /// `[estimation] hold`: every name a value of this model, each once.
    fn hold(&mut self, raw: Option<&RawEstimation>, cl: &Parameter, v: &Parameter) -> Vec<String> {
        let mut held: Vec<String> = Vec::new();
        for name in raw.map(|r| r.hold.as_slice()).unwrap_or_default() {
            let text = name.get_ref().trim();
            let covariate = |prefix: &str, p: &Parameter| {
                text.strip_prefix(prefix).is_some_and(|c| p.covariates.iter().any(|e| e.covariate == c))
            };
            let known = HOLDABLE.contains(&text)
                || covariate("clearance.covariates.", cl)
                || covariate("volume.covariates.", v);
            if !known {
                self.errors.push(self.text.error_at(
                    name.span(),
                    "estimation.hold",
                    format!(
                        "'{text}' is not a value of this model; expected one of {}, or \
                         clearance.covariates.NAME / volume.covariates.NAME for a covariate effect",
                        HOLDABLE.join(", ")
                    ),
                ));
            } else if held.iter().any(|h| h == text) {
                self.errors.push(self.text.error_at(
                    name.span(),
                    "estimation.hold",
                    format!("'{text}' is held twice"),
                ));
            } else {
                held.push(text.to_string());
            }
        }
        held
    }
}

/// Ω of the random effects of ln CL, ln V and ln ka (top-left 2×2 when ka does not vary).
fn covariance(cl: &Parameter, v: &Parameter, abs: Option<&Absorption>, corr: &Correlations) -> Mat {
    let variances = [cl.omega2, v.omega2, abs.map_or(0.0, |a| a.ka.omega2)];
    let mut omega = [[0.0; MAX]; MAX];
    for i in 0..MAX {
        for j in 0..MAX {
            omega[i][j] = if i == j {
                variances[i]
            } else {
                corr.between(i, j).unwrap_or(0.0) * (variances[i] * variances[j]).sqrt()
            };
        }
    }
    omega
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
        let mut correlation = Correlations::default();
        let ka_varies = absorption.as_ref().is_some_and(|a| a.ka.varies());
        if let Some(r) = &raw.correlation {
            for (value, key, slot) in [
                (&r.cl_v, "correlation.cl_v", &mut correlation.cl_v),
                (&r.cl_ka, "correlation.cl_ka", &mut correlation.cl_ka),
                (&r.v_ka, "correlation.v_ka", &mut correlation.v_ka),
            ] {
                let Some(value) = value else { continue };
                let x = *value.get_ref();
                c.require(
                    x.abs() < 1.0,
                    value,
                    key,
                    &format!("expected a correlation strictly between -1 and 1, found {x}"),
                );
                if key != "correlation.cl_v" {
                    c.require(
                        ka_varies,
                        value,
                        key,
                        "a correlation with ka needs ka to vary between subjects (absorption.bsv_cv above 0)",
                    );
                }
                *slot = Some(x);
            }
            let span = [&r.cl_v, &r.cl_ka, &r.v_ka].into_iter().flatten().next();
            if let Some(span) = span
                && c.errors.is_empty()
            {
                let omega = covariance(&clearance, &volume, absorption.as_ref(), &correlation);
                c.require(
                    cholesky(&omega, if ka_varies { 3 } else { 2 }).is_some(),
                    span,
                    "correlation",
                    "these correlations do not form a valid covariance (the matrix is not positive definite)",
                );
            }
        }
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
        let hold = c.hold(raw.estimation.as_ref(), &clearance, &volume);
        if !c.errors.is_empty() {
            return Err(c.errors);
        }
        Ok(PopulationModel {
            drug: raw.drug.and_then(|d| d.name),
            clearance,
            volume,
            correlation,
            absorption,
            residual: Residual { additive_mg_l: additive, proportional_cv: proportional },
            hold,
            warnings: c.warnings,
        })
    }

    /// Read and validate a model file.
    pub fn read(path: &str) -> Result<PopulationModel, Vec<InputError>> {
        PopulationModel::parse(&TomlText::read(path).map_err(|e| vec![e])?)
    }

    /// The number of random effects: 2 (ln CL, ln V), or 3 when ka varies between subjects.
    pub fn random_effects(&self) -> usize {
        if self.absorption.as_ref().is_some_and(|a| a.ka.varies()) { 3 } else { 2 }
    }

    /// Ω, the covariance of the random effects of ln CL, ln V and ln ka, in the top-left
    /// [`random_effects`](Self::random_effects) × that corner (the rest 0). Valid by
    /// construction: the reader refuses correlations that do not form a covariance.
    pub fn omega(&self) -> Mat {
        covariance(&self.clearance, &self.volume, self.absorption.as_ref(), &self.correlation)
    }

    /// The lower-triangular Cholesky factor L of [`omega`](Self::omega) (Ω = L·Lᵀ), for drawing
    /// random effects η = L·z.
    pub fn omega_factor(&self) -> Mat {
        // Valid by construction (see `omega`); an all-zero factor would only remove variability.
        cholesky(&self.omega(), self.random_effects()).unwrap_or_default()
    }

    /// One subject's random effects η = L·z of ln CL, ln V and ln ka (0 when ka does not vary),
    /// from standard normals drawn from `rng`: two, and a third for every model with
    /// absorption, so that a subject's draws do not depend on whether ka varies.
    pub fn draw_eta(&self, rng: &mut impl rand::Rng) -> [f64; MAX] {
        use rand::distr::Distribution;
        let normal = statrs::distribution::Normal::standard();
        let mut z = [normal.sample(rng), normal.sample(rng), 0.0];
        if self.absorption.is_some() {
            z[2] = normal.sample(rng);
        }
        let factor = self.omega_factor();
        std::array::from_fn(|i| (0..=i).map(|j| factor[i][j] * z[j]).sum::<f64>())
    }

    /// Whether population estimation holds the value `key` (a [`HOLDABLE`] key or a covariate
    /// effect's `clearance.covariates.NAME`).
    pub fn holds(&self, key: &str) -> bool {
        self.hold.iter().any(|h| h == key)
    }

    /// Typical clearance and volume for one set of covariates.
    pub fn typical_cl_v(&self, covariates: &Covariates) -> Result<(f64, f64), InputError> {
        Ok((self.clearance.typical_for(covariates)?, self.volume.typical_for(covariates)?))
    }

    /// The model as a model file that [`parse`](Self::parse) reads back to the same model.
    /// Numbers are written in the shortest form that reads back to the same `f64`; a
    /// variability is written as its CV, whose ω² = ln(1 + CV²) reads back to within rounding.
    pub fn to_toml(&self) -> String {
        let mut out = String::new();
        if let Some(name) = &self.drug {
            out += &format!("[drug]\nname = {}\n\n", toml_string(name));
        }
        let range = |r: Option<(f64, f64)>, key: &str| {
            r.map_or(String::new(), |(lo, hi)| {
                format!("{key} = [{}, {}]\n", toml_number(lo), toml_number(hi))
            })
        };
        for (table, p, typical_key, plausible_key) in [
            ("clearance", &self.clearance, "typical_l_h", "plausible_l_h"),
            ("volume", &self.volume, "typical_l", "plausible_l"),
        ] {
            out += &format!(
                "[{table}]\n{typical_key} = {}\nbsv_cv = {}\n{}",
                toml_number(p.typical),
                toml_number(p.bsv_cv),
                range(p.plausible, plausible_key)
            );
            for c in &p.covariates {
                out += &format!(
                    "[[{table}.covariates]]\ncovariate = {}\nform = \"{}\"\nreference = {}\neffect = {}\n",
                    toml_string(&c.covariate),
                    c.form.name(),
                    toml_number(c.reference),
                    toml_number(c.effect)
                );
            }
            out += "\n";
        }
        let c = &self.correlation;
        let present: Vec<String> = [("cl_v", c.cl_v), ("cl_ka", c.cl_ka), ("v_ka", c.v_ka)]
            .into_iter()
            .filter_map(|(key, v)| Some(format!("{key} = {}\n", toml_number(v?))))
            .collect();
        if !present.is_empty() {
            out += &format!("[correlation]\n{}\n", present.concat());
        }
        if let Some(a) = &self.absorption {
            out += &format!(
                "[absorption]\ntypical_ka_per_h = {}\nbsv_cv = {}\n{}f = {}\ntlag_h = {}\n\n",
                toml_number(a.ka.typical),
                toml_number(a.ka.bsv_cv),
                range(a.ka.plausible, "plausible_ka_per_h"),
                toml_number(a.f),
                toml_number(a.tlag_h)
            );
        }
        out += &format!(
            "[residual]\nadditive_mg_l = {}\nproportional_cv = {}\n",
            toml_number(self.residual.additive_mg_l),
            toml_number(self.residual.proportional_cv)
        );
        if !self.hold.is_empty() {
            let names: Vec<String> = self.hold.iter().map(|h| toml_string(h)).collect();
            out += &format!("\n[estimation]\nhold = [{}]\n", names.join(", "));
        }
        out
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

/// A number as TOML reads it back exactly (always with a decimal point or exponent, so it is
/// a float).
fn toml_number(x: f64) -> String {
    let text = format!("{x:?}");
    if text.contains(['.', 'e', 'E']) || !x.is_finite() { text } else { format!("{text}.0") }
}

/// A string as a TOML basic string.
fn toml_string(s: &str) -> String {
    let mut out = String::from("\"");
    for ch in s.chars() {
        match ch {
            '"' => out += "\\\"",
            '\\' => out += "\\\\",
            c if c.is_control() => out += &format!("\\u{:04X}", c as u32),
            c => out.push(c),
        }
    }
    out + "\""
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
    fn a_written_model_reads_back_the_same() {
        let text = EXAMPLE.replace("[residual]", "[absorption]\ntypical_ka_per_h = 1.3\nbsv_cv = 0.4\n[correlation]\ncl_v = 0.25\nv_ka = -0.1\n[residual]")
            + "[estimation]\nhold = [\"residual.additive_mg_l\", \"clearance.covariates.crcl_ml_min\"]\n[drug]\nname = \"a \\\"quoted\\\" name\"\n";
        let m = PopulationModel::parse(&TomlText::new("m.toml", &text)).unwrap();
        let back = PopulationModel::parse(&TomlText::new("out.toml", &m.to_toml())).unwrap();
        assert_eq!(back, m, "{}", m.to_toml());
        assert_eq!(m.random_effects(), 3);
        let omega = m.omega();
        assert!((omega[1][2] - -0.1 * (m.volume.omega2 * 0.16f64.ln_1p()).sqrt()).abs() < 1e-15);
        assert!(omega[0][2].abs() < f64::MIN_POSITIVE);
    }

    #[test]
    fn correlations_must_form_a_covariance() {
        let text = EXAMPLE.replace("[residual]", "[absorption]\ntypical_ka_per_h = 1.3\nbsv_cv = 0.4\n[correlation]\ncl_v = 0.9\ncl_ka = 0.9\nv_ka = -0.9\n[residual]");
        let e = PopulationModel::parse(&TomlText::new("m.toml", &text)).unwrap_err();
        assert!(e[0].message.contains("not positive definite"), "{e:?}");
        let text = EXAMPLE.replace("[residual]", "[correlation]\ncl_ka = 0.2\n[residual]");
        let e = PopulationModel::parse(&TomlText::new("m.toml", &text)).unwrap_err();
        assert!(e[0].message.contains("needs ka to vary"), "{e:?}");
        let text = EXAMPLE.to_string() + "[estimation]\nhold = [\"volume.covariates.weight_kg\"]\n";
        let e = PopulationModel::parse(&TomlText::new("m.toml", &text)).unwrap_err();
        assert!(e[0].message.contains("not a value of this model"), "{e:?}");
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
