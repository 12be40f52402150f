//! The fitter against a general-purpose reference library: scipy 1.17.1 (numpy 2.4.6).
//!
//! `tests/reference/fit_reference.py` defines a handful of invented cases (infusion, bolus and
//! oral histories, 2–4 levels, levels below the limit, a covariate-adjusted prior), writes the
//! one-compartment model again as a closed-form superposition sharing no code with ours, and
//! computes the weighted-least-squares optima with `scipy.optimize.least_squares` and the MAP
//! optima with `scipy.optimize.minimize` (BFGS, then Nelder–Mead and BFGS again to polish).
//! It records the objectives at fixed points too, so the objective itself is checked apart
//! from the optimiser. CI does not run Python: it reads the committed JSON.

use crate::common::{assert_rel, rel_err};
use cistern::covariates::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::fit::objective::{Fixed, Likelihood, Prior, Problem, Weighting};
use cistern::fit::{FitOptions, FitResult, Intervals, Method, SubjectData, fit_subject};
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::model::{PopulationModel, Residual};
use serde::Deserialize;
use std::collections::BTreeMap;

/// The library that computed the reference values; the JSON must say the same.
const SCIPY_VERSION: &str = "1.17.1";

/// Agreement required of our optima with scipy's, on CL and V (the criterion).
const OPTIMUM_TOL: f64 = 1e-5;

#[derive(Deserialize)]
struct Reference {
    scipy: String,
    numpy: String,
    cases: Vec<Case>,
}

#[derive(Deserialize)]
struct RefDose {
    time_h: f64,
    amount_mg: f64,
    route: String,
    duration_h: f64,
}

#[derive(Deserialize)]
struct RefLevel {
    time_h: f64,
    conc_mg_l: Option<f64>,
    lloq_mg_l: Option<f64>,
}

#[derive(Deserialize)]
struct RefCovariate {
    covariate: String,
    reference: f64,
    effect: f64,
}

#[derive(Deserialize)]
struct RefModel {
    cl_typical_l_h: f64,
    cl_cv: f64,
    v_typical_l: f64,
    v_cv: f64,
    correlation_cl_v: f64,
    additive_mg_l: f64,
    proportional_cv: f64,
    cl_covariate: Option<RefCovariate>,
    v_covariate: Option<RefCovariate>,
}

#[derive(Deserialize)]
struct Optimum {
    cl_l_h: f64,
    v_l: f64,
    objective: f64,
    theta_error_estimate: f64,
    hessian_positive_definite: bool,
}

#[derive(Deserialize)]
struct Case {
    name: String,
    doses: Vec<RefDose>,
    levels: Vec<RefLevel>,
    ka_per_h: Option<f64>,
    f: f64,
    model: RefModel,
    covariates: BTreeMap<String, f64>,
    prior_mean: [f64; 2],
    prior_precision: [[f64; 2]; 2],
    map: Optimum,
    wls: BTreeMap<String, Optimum>,
    objective_checks: Vec<BTreeMap<String, serde_json::Value>>,
}

fn reference() -> Reference {
    let r: Reference = serde_json::from_str(include_str!("../reference/fit_reference.json"))
        .expect("tests/reference/fit_reference.json parses");
    assert_eq!(r.scipy, SCIPY_VERSION, "the reference values were regenerated: update SCIPY_VERSION");
    assert!(!r.numpy.is_empty() && r.cases.len() >= 5);
    r
}

fn weighting(name: &str) -> Weighting {
    match name {
        "none" => Weighting::None,
        "1/y" => Weighting::InvY,
        "1/y^2" => Weighting::InvY2,
        other => panic!("unknown weighting {other} in the reference file"),
    }
}

impl Case {
    fn doses(&self) -> Vec<Dose> {
        self.doses
            .iter()
            .map(|d| Dose {
                time_h: d.time_h,
                amount_mg: d.amount_mg,
                route: Route::parse(&d.route).expect("a route"),
                duration_h: d.duration_h,
            })
            .collect()
    }

    fn levels(&self) -> Vec<Level> {
        self.levels
            .iter()
            .zip(1..)
            .map(|(l, line)| Level { time_h: l.time_h, conc_mg_l: l.conc_mg_l, lloq_mg_l: l.lloq_mg_l, line })
            .collect()
    }

    fn subject(&self) -> SubjectData {
        let mut covariates = Covariates::default();
        for (name, value) in &self.covariates {
            covariates.set(name, *value);
        }
        SubjectData { id: Some(self.name.clone()), doses: self.doses(), levels: self.levels(), covariates }
    }

    /// The case's population model, written as a model file and read by the library, so the
    /// prior (ω² from CV, covariance from the correlation, covariate-adjusted typical values)
    /// comes from the same path as `cistern fit --model`. For oral cases the file gives ka a
    /// variable prior at another value, so the test also shows that a ka given as an option
    /// is held fixed.
    fn model(&self) -> PopulationModel {
        let m = &self.model;
        let covariate = |table: &str, c: &Option<RefCovariate>| {
            c.as_ref().map_or_else(String::new, |c| {
                format!(
                    "[[{table}.covariates]]\ncovariate = \"{}\"\nform = \"power\"\nreference = {:?}\neffect = {:?}\n",
                    c.covariate, c.reference, c.effect
                )
            })
        };
        let mut text = format!(
            "[clearance]\ntypical_l_h = {:?}\nbsv_cv = {:?}\n{}[volume]\ntypical_l = {:?}\nbsv_cv = {:?}\n{}\
             [correlation]\ncl_v = {:?}\n[residual]\nadditive_mg_l = {:?}\nproportional_cv = {:?}\n",
            m.cl_typical_l_h,
            m.cl_cv,
            covariate("clearance", &m.cl_covariate),
            m.v_typical_l,
            m.v_cv,
            covariate("volume", &m.v_covariate),
            m.correlation_cl_v,
            m.additive_mg_l,
            m.proportional_cv,
        );
        if self.ka_per_h.is_some() {
            text += &format!("[absorption]\ntypical_ka_per_h = 0.7\nbsv_cv = 0.5\nf = {:?}\n", self.f);
        }
        PopulationModel::parse(&TomlText::new("reference-model.toml", &text))
            .unwrap_or_else(|e| panic!("{}: the model file does not parse: {e:?}\n{text}", self.name))
    }

    fn options(&self, method: Method, weighting: Weighting) -> FitOptions {
        FitOptions {
            method,
            intervals: Intervals::None,
            weighting,
            ka_per_h: self.ka_per_h,
            f: self.f,
            ..FitOptions::default()
        }
    }

    fn fixed(&self) -> Fixed {
        Fixed { n: 2, ka_per_h: self.ka_per_h, f: self.f, tlag_h: 0.0 }
    }
}

/// Relative error of our CL and V against scipy's, and a check of the rest of the fit.
fn compare(case: &Case, what: &str, ours: &FitResult, scipy: &Optimum) -> f64 {
    // The script's own estimate of how far its θ is from the stationary point (the remaining
    // Newton step) must be far below the tolerance, or the comparison would mean nothing.
    assert!(scipy.theta_error_estimate < 1e-7 && scipy.hessian_positive_definite, "{}: {what}", case.name);
    assert!(ours.converged, "{}: {what}: not converged: {:?}", case.name, ours.warnings);
    let e_cl = rel_err(ours.estimates.cl_l_h.value, scipy.cl_l_h, 0.0);
    let e_v = rel_err(ours.estimates.v_l.value, scipy.v_l, 0.0);
    eprintln!("{:<60} {what:<10} relative error CL {e_cl:.1e}, V {e_v:.1e}", case.name);
    let label = format!("{}: {what}", case.name);
    assert_rel(ours.estimates.cl_l_h.value, scipy.cl_l_h, OPTIMUM_TOL, 0.0, &format!("{label}: CL"));
    assert_rel(ours.estimates.v_l.value, scipy.v_l, OPTIMUM_TOL, 0.0, &format!("{label}: V"));
    // The objective at the optimum: flat there, so it agrees far more tightly than θ. A
    // perfect two-level fit has objective ≈ 0 on both sides; the floor compares it absolutely.
    assert_rel(ours.objective, scipy.objective, 1e-9, 1e-12, &format!("{label}: objective"));
    e_cl.max(e_v)
}

#[test]
fn map_optima_agree_with_scipy_minimize() {
    let reference = reference();
    let mut worst: f64 = 0.0;
    for case in &reference.cases {
        let model = case.model();
        let fit = fit_subject(&case.subject(), Some(&model), &case.options(Method::Map, Weighting::None), 1)
            .unwrap_or_else(|e| panic!("{}: {e}", case.name));
        worst = worst.max(compare(case, "map", &fit, &case.map));
        // The covariate-adjusted typical values the library used are scipy's prior mean.
        let prior = fit.prior.expect("map reports the prior");
        assert_rel(prior.cl_l_h, case.prior_mean[0].exp(), 1e-13, 0.0, &format!("{}: typical CL", case.name));
        assert_rel(prior.v_l, case.prior_mean[1].exp(), 1e-13, 0.0, &format!("{}: typical V", case.name));
        if case.ka_per_h.is_some() {
            assert!(fit.estimates.ka_per_h.is_none(), "{}: ka was given, so it is not estimated", case.name);
        }
    }
    eprintln!("map: largest relative difference from scipy {SCIPY_VERSION} on CL or V: {worst:.1e}");
}

#[test]
fn wls_optima_agree_with_scipy_least_squares() {
    let reference = reference();
    let mut worst: f64 = 0.0;
    for case in &reference.cases {
        for (name, scipy) in &case.wls {
            let options = case.options(Method::Wls, weighting(name));
            let fit = fit_subject(&case.subject(), None, &options, 1)
                .unwrap_or_else(|e| panic!("{}: wls {name}: {e}", case.name));
            worst = worst.max(compare(case, &format!("wls {name}"), &fit, scipy));
        }
        assert_eq!(case.wls.len(), 3, "{}: none, 1/y and 1/y^2", case.name);
    }
    eprintln!("wls: largest relative difference from scipy {SCIPY_VERSION} on CL or V: {worst:.1e}");
}

#[test]
fn objective_values_agree_with_the_reference_script() {
    // The objectives themselves, at fixed θ (the prior mean, the MAP and two points away from
    // it), computed by the script from the formulas with scipy.stats.norm.logcdf for M3.
    let reference = reference();
    let mut points = 0;
    for case in &reference.cases {
        let (doses, levels) = (case.doses(), case.levels());
        let m = &case.model;
        let mut precision = [[0.0; 3]; 3];
        for (i, row) in case.prior_precision.iter().enumerate() {
            precision[i][..2].copy_from_slice(row);
        }
        let prior = Prior { mean: [case.prior_mean[0], case.prior_mean[1], 0.0], precision };
        let residual = Residual { additive_mg_l: m.additive_mg_l, proportional_cv: m.proportional_cv };
        let map = Problem::new(&doses, &levels, case.fixed(), Likelihood::Bayes(residual), Some(prior));
        for check in &case.objective_checks {
            let theta: Vec<f64> = serde_json::from_value(check["theta"].clone()).expect("theta");
            let label = format!("{} at θ = {theta:?}", case.name);
            let value = |key: &str| check[key].as_f64().unwrap_or_else(|| panic!("{label}: {key}"));
            assert_rel(map.cost(&theta), value("map"), 1e-11, 1.0, &format!("{label}: map"));
            for name in ["none", "1/y", "1/y^2"] {
                let wls = Problem::new(
                    &doses,
                    &levels,
                    case.fixed(),
                    Likelihood::LeastSquares(weighting(name)),
                    None,
                );
                assert_rel(
                    wls.cost(&theta),
                    value(&format!("wls {name}")),
                    1e-11,
                    1e-6,
                    &format!("{label}: {name}"),
                );
            }
            points += 1;
        }
    }
    assert!(points >= 20, "{points}");
}
