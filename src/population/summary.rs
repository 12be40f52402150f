//! The result of a population estimation as the user reads it: each estimate on the model
//! file's scale with its standard error, relative standard error and 95 % interval (the delta
//! method on φ's scale, intervals transformed from φ's), Ω, the correlation of the estimates,
//! η-shrinkage, each subject's conditional mode, the objective with AIC and BIC, and warnings.
//! docs/formats.md lists every key.

use super::space::{EFFECTS, Free, Space};
use super::uncertainty::{Bootstrap, Covariance};
use super::{Convergence, Method, Options, Outcome};
use crate::fit::{Estimate, SubjectData};
use crate::model::PopulationModel;
use crate::stats::interpolated_quantile;
use crate::warning::{Code, Warning};
use serde::ser::{Serialize, SerializeMap, Serializer};

/// The 97.5 % quantile of the standard normal.
const Z: f64 = 1.959963984540054;

/// One estimate as the model file states it.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Estimated {
    /// Value, standard error and 95 % interval.
    #[serde(flatten)]
    pub estimate: Estimate,
    /// 100·SE/|value|.
    pub rse_pct: Option<f64>,
    /// Held at the model file's value (`[estimation] hold`), not estimated.
    #[serde(skip_serializing_if = "std::ops::Not::not")]
    pub held: bool,
    /// The bootstrap's 2.5–97.5 percentile interval.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bootstrap_ci95: Option<[f64; 2]>,
}

/// Named values in a fixed order, written as a JSON object.
#[derive(Debug, Clone)]
pub struct Named<T>(pub Vec<(String, T)>);

impl<T: Serialize> Serialize for Named<T> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut map = s.serialize_map(Some(self.0.len()))?;
        for (k, v) in &self.0 {
            map.serialize_entry(k, v)?;
        }
        map.end()
    }
}

impl<T> Named<T> {
    /// The value named `key`.
    pub fn get(&self, key: &str) -> Option<&T> {
        self.0.iter().find(|(k, _)| k == key).map(|(_, v)| v)
    }
}

/// A square matrix with its row (and column) names.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Matrix {
    /// Row and column names.
    pub names: Vec<String>,
    /// Rows.
    pub matrix: Vec<Vec<f64>>,
}

/// The objective and the information criteria.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Objective {
    /// −2 ln L, with every normal density's constant.
    pub minus2ll: f64,
    /// −2 ln L + 2k.
    pub aic: f64,
    /// −2 ln L + k·ln(number of levels).
    pub bic: f64,
    /// Levels, including those below the limit.
    pub n_observations: usize,
    /// Subjects.
    pub n_subjects: usize,
    /// k: the estimated values.
    pub n_parameters: usize,
}

/// A subject's individual parameters at its conditional mode.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SubjectEstimate {
    /// Identifier.
    pub subject: Option<String>,
    /// Clearance (L/h).
    pub cl_l_h: f64,
    /// Volume (L).
    pub v_l: f64,
    /// ka (1/h), when it is a random effect.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ka_per_h: Option<f64>,
}

/// The quadrature rules used.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Nodes {
    /// The fewest nodes along any principal axis of any subject.
    pub min: usize,
    /// The most.
    pub max: usize,
    /// With the nodes chosen per subject: the largest sum over a subject's axes of the change
    /// in its −2 ln Lᵢ when one axis moves a rung up (an estimate of the quadrature's error).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub successive_rules_differ_by: Option<f64>,
}

/// The bootstrap in brief.
#[derive(Debug, Clone, serde::Serialize)]
pub struct BootstrapSummary {
    /// Replicates run.
    pub replicates: usize,
    /// The share of replicates whose estimation converged.
    pub converged_share: f64,
    /// Seed of the resampling.
    pub seed: u64,
}

/// A population estimation, ready to write.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Estimation {
    /// The likelihood.
    pub method: Method,
    /// Gauss–Hermite nodes per random effect (quadrature).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub nodes: Option<Nodes>,
    /// The model's values were evaluated, not estimated (`--evaluate`).
    pub evaluated_only: bool,
    /// Whether the estimation converged.
    pub converged: bool,
    /// How it ended.
    pub convergence: Convergence,
    /// The objective.
    pub objective: Objective,
    /// Typical values and covariate effects.
    pub typical: Named<Estimated>,
    /// Between-subject variability (CV) and correlations.
    pub bsv: Named<Estimated>,
    /// Residual error.
    pub residual: Named<Estimated>,
    /// Ω.
    pub omega: Matrix,
    /// Correlations of the estimates (φ's scale), when the standard errors exist.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub correlation: Option<Matrix>,
    /// 100·(1 − SD(η̂)/ω) per random effect (Savic & Karlsson 2009).
    pub eta_shrinkage_pct: Named<f64>,
    /// The bootstrap, when run.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bootstrap: Option<BootstrapSummary>,
    /// Each subject's individual parameters at its conditional mode.
    pub subjects: Vec<SubjectEstimate>,
    /// What was held or left out, and why.
    pub notes: Vec<String>,
    /// Things the user should know, each with its stable code.
    pub warnings: Vec<Warning>,
    /// The estimated model, as `--model-out` writes it.
    #[serde(skip)]
    pub model: PopulationModel,
}

/// A label for an estimate's (object, key) as `cistern population` writes them: `typical
/// clearance (L/h)`, `effect of weight_kg on volume`.
pub fn describe(object: &str, key: &str) -> String {
    let fixed = match (object, key) {
        ("typical", "cl_l_h") => "typical clearance (L/h)",
        ("typical", "v_l") => "typical volume (L)",
        ("typical", "ka_per_h") => "typical ka (1/h)",
        ("bsv", "cl_cv") => "variability of clearance (CV)",
        ("bsv", "v_cv") => "variability of volume (CV)",
        ("bsv", "ka_cv") => "variability of ka (CV)",
        ("residual", "additive_mg_l") => "additive residual SD (mg/L)",
        ("residual", "proportional_cv") => "proportional residual (CV)",
        _ => "",
    };
    if !fixed.is_empty() {
        return fixed.into();
    }
    if let Some(rest) = key.strip_suffix("_correlation") {
        return format!("correlation of η {}", rest.replace('_', " and η "));
    }
    if let Some(rest) = key.strip_suffix("_effect") {
        let (parameter, covariate) = rest.split_once('_').unwrap_or((rest, ""));
        return format!(
            "effect of {covariate} on {}",
            if parameter == "cl" { "clearance" } else { "volume" }
        );
    }
    key.into()
}

/// An estimate on the model file's scale from φ's value and standard error: (value, SE, 95 %
/// interval), by the delta method and the transformed interval.
fn transform(free: Free, phi: f64, se: Option<f64>) -> (f64, Option<f64>, Option<[f64; 2]>) {
    let to = |x: f64| match free {
        Free::Effect { .. } => x,
        Free::LogSd(_) => (2.0 * x).exp().exp_m1().sqrt(),
        Free::Correlation(..) => x.tanh(),
        Free::Typical(_) | Free::Additive | Free::Proportional => x.exp(),
    };
    let value = to(phi);
    let slope = match free {
        Free::Effect { .. } => 1.0,
        Free::LogSd(_) => {
            let w2 = (2.0 * phi).exp();
            w2.exp() * w2 / value
        }
        Free::Correlation(..) => 1.0 - value * value,
        _ => value,
    };
    let se = se.filter(|s| s.is_finite());
    (value, se.map(|s| s * slope.abs()), se.map(|s| [to(phi - Z * s), to(phi + Z * s)]))
}

fn estimated(value: f64, se: Option<f64>, ci95: Option<[f64; 2]>, held: bool) -> Estimated {
    Estimated {
        estimate: Estimate { value, se, ci95 },
        rse_pct: se.filter(|_| value != 0.0).map(|s| 100.0 * s / value.abs()),
        held,
        bootstrap_ci95: None,
    }
}

/// Where an entry of φ is reported: (object, key).
fn key(space: &Space, free: Free) -> (&'static str, String) {
    let m = &space.base;
    match free {
        Free::Typical(p) => ("typical", ["cl_l_h", "v_l", "ka_per_h"][p].into()),
        Free::Effect { p, e } => {
            let c = &[&m.clearance, &m.volume][p].covariates[e];
            ("typical", format!("{}_{}_effect", EFFECTS[p], c.covariate))
        }
        Free::LogSd(p) => ("bsv", format!("{}_cv", EFFECTS[p])),
        Free::Correlation(i, j) => ("bsv", format!("{}_{}_correlation", EFFECTS[i], EFFECTS[j])),
        Free::Additive => ("residual", "additive_mg_l".into()),
        Free::Proportional => ("residual", "proportional_cv".into()),
    }
}

/// A value as the model file states it.
fn stated(model: &PopulationModel, free: Free) -> f64 {
    let parameter = |p: usize| Space::parameter(model, p);
    match free {
        Free::Typical(p) => parameter(p).typical,
        Free::Effect { p, e } => parameter(p).covariates[e].effect,
        Free::LogSd(p) => parameter(p).bsv_cv,
        Free::Correlation(i, j) => model.correlation.between(i, j).unwrap_or(0.0),
        Free::Additive => model.residual.additive_mg_l,
        Free::Proportional => model.residual.proportional_cv,
    }
}

impl Estimation {
    /// Every estimate in reading order: (object, key, estimate).
    pub fn rows(&self) -> Vec<(&'static str, &str, &Estimated)> {
        let mut out = Vec::new();
        for (object, named) in [("typical", &self.typical), ("bsv", &self.bsv), ("residual", &self.residual)]
        {
            out.extend(named.0.iter().map(|(k, e)| (object, k.as_str(), e)));
        }
        out
    }

    /// Summarise an outcome.
    pub(super) fn new(
        outcome: Outcome,
        covariance: Option<Covariance>,
        bootstrap: Option<Bootstrap>,
        subjects: &[SubjectData],
        options: &Options,
        notes: Vec<String>,
        nodes: Option<Nodes>,
    ) -> Estimation {
        let space = &outcome.space;
        let model = space.model(&outcome.phi);
        let n = space.n;
        let p = outcome.phi.len();
        let mut warnings = Vec::new();
        if !options.evaluate && !outcome.converged {
            warnings.push(Warning::new(
                Code::NotConverged,
                format!(
                    "the estimation did not converge ({}; largest gradient component {:.2e}): treat the estimates \
                     as provisional",
                    outcome.convergence.reason, outcome.convergence.gradient_norm
                ),
            ));
        }
        let matrix = covariance.as_ref().and_then(|c| c.matrix.as_ref());
        if let Some(c) = &covariance
            && !c.unidentified.is_empty()
        {
            let names: Vec<String> = c.unidentified.iter().map(|&k| space.name(k)).collect();
            warnings.push(Warning::new(
                Code::NotIdentifiable,
                format!(
                    "the observed information is not positive definite: the data do not identify {} (hold it \
                     with [estimation] hold, or drop it from the model); no standard errors",
                    names.join(", ")
                ),
            ));
        }
        // Bootstrap values on the reporting scale, per entry of φ.
        let replicates: Vec<&Vec<f64>> = bootstrap
            .as_ref()
            .map(|b| b.replicates.iter().filter_map(|r| r.0.as_ref()).collect())
            .unwrap_or_default();
        let mut objects: [Vec<(String, Estimated)>; 3] = Default::default();
        for free in Space::structure(&model, n) {
            let index = space.free.iter().position(|f| *f == free);
            let (value, se, ci95) = match index {
                Some(k) => transform(free, outcome.phi[k], matrix.map(|m| m[(k, k)].max(0.0).sqrt())),
                None => (stated(&model, free), None, None),
            };
            let mut e = estimated(value, se, ci95, index.is_none());
            if let Some(k) = index
                && replicates.len() >= 2
            {
                let mut values: Vec<f64> = replicates.iter().map(|r| transform(free, r[k], None).0).collect();
                values.sort_by(f64::total_cmp);
                e.bootstrap_ci95 =
                    Some([interpolated_quantile(&values, 0.025), interpolated_quantile(&values, 0.975)]);
            }
            let (object, key) = key(space, free);
            let slot = ["typical", "bsv", "residual"].iter().position(|o| *o == object).unwrap_or(0);
            objects[slot].push((key, e));
        }
        let [typical, bsv, residual] = objects;
        let omega = model.omega();
        let effect_names: Vec<String> = EFFECTS[..n].iter().map(|s| s.to_string()).collect();
        let omega =
            Matrix { names: effect_names.clone(), matrix: (0..n).map(|i| omega[i][..n].to_vec()).collect() };
        let correlation = matrix.map(|m| Matrix {
            names: (0..p).map(|k| space.name(k)).collect(),
            matrix: (0..p)
                .map(|i| (0..p).map(|j| m[(i, j)] / (m[(i, i)] * m[(j, j)]).sqrt()).collect())
                .collect(),
        });
        // η-shrinkage from the conditional modes' deviations from their prior means.
        let shrinkage: Vec<(String, f64)> = (0..n)
            .map(|i| {
                let eta: Vec<f64> = outcome.modes.iter().map(|(mode, mean)| mode[i] - mean[i]).collect();
                let mean = eta.iter().sum::<f64>() / eta.len() as f64;
                let var = eta.iter().map(|e| (e - mean).powi(2)).sum::<f64>() / (eta.len() - 1).max(1) as f64;
                (effect_names[i].clone(), 100.0 * (1.0 - var.sqrt() / omega.matrix[i][i].sqrt()))
            })
            .collect();
        for (name, s) in &shrinkage {
            if *s > 50.0 {
                warnings.push(Warning::new(
                    Code::HighShrinkage,
                    format!(
                        "η-shrinkage of {name} is {s:.0} %: the individual {name} estimates say little about \
                         the individuals, and its variability is poorly informed by these data"
                    ),
                ));
            }
        }
        let n_observations = subjects.iter().map(|s| s.levels.len()).sum();
        let m2ll = outcome.minus2ll;
        let subjects_out = subjects
            .iter()
            .zip(&outcome.modes)
            .map(|(s, (mode, _))| SubjectEstimate {
                subject: s.id.clone(),
                cl_l_h: mode[0].exp(),
                v_l: mode[1].exp(),
                ka_per_h: (n == 3).then(|| mode[2].exp()),
            })
            .collect();
        let bootstrap = bootstrap.map(|b| BootstrapSummary {
            replicates: b.replicates.len(),
            converged_share: b.replicates.iter().filter(|r| r.1).count() as f64
                / b.replicates.len().max(1) as f64,
            seed: options.seed,
        });
        Estimation {
            method: options.method,
            nodes,
            evaluated_only: options.evaluate,
            converged: outcome.converged,
            convergence: outcome.convergence,
            objective: Objective {
                minus2ll: m2ll,
                aic: m2ll + 2.0 * p as f64,
                bic: m2ll + p as f64 * (n_observations as f64).ln(),
                n_observations,
                n_subjects: subjects.len(),
                n_parameters: p,
            },
            typical: Named(typical),
            bsv: Named(bsv),
            residual: Named(residual),
            omega,
            correlation,
            eta_shrinkage_pct: Named(shrinkage),
            bootstrap,
            subjects: subjects_out,
            notes,
            warnings,
            model,
        }
    }
}
