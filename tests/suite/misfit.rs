//! Misfit warnings: they fire on the open indomethacin data (two-exponential after a bolus)
//! and not on the theophylline data with first-order absorption; their rates on simulated
//! studies (the `#[ignore]`d calibration, whose numbers are in docs/methods.md, section 12.4).

use crate::common::ran;
use cistern::diagnostics::{SIMULATIONS, for_fits};
use cistern::engine::Params;
use cistern::fit::objective::Weighting;
use cistern::fit::{FitOptions, Method, SubjectData, fit_all};
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use cistern::warning::Code;
use cistern::{Covariates, Dose, Route};
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use serde_json::Value;
use statrs::distribution::Normal;
use std::path::PathBuf;

fn open_data_fit(name: &str) -> Value {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/nca");
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(["fit", "--method", "wls", "--format", "json", "-q"]);
    command.arg("--doses").arg(dir.join(format!("{name}_doses.csv")));
    command.arg("--levels").arg(dir.join(format!("{name}_levels.csv")));
    let out = ran(command);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

fn codes(warnings: &Value) -> Vec<&str> {
    warnings.as_array().unwrap().iter().map(|w| w["code"].as_str().unwrap()).collect()
}

#[test]
fn misfit_fires_on_the_indomethacin_data() {
    // R's datasets::Indometh (exported by tests/reference/nca/export_datasets.R): six subjects,
    // one intravenous bolus, clearly two-exponential.
    let fit = open_data_fit("indometh");
    let study = &fit["warnings"];
    assert_eq!(codes(study), ["model_misfit"], "{study}");
    let message = study[0]["message"].as_str().unwrap();
    assert!(message.contains("late levels are under-predicted"), "{message}");
    assert!(message.contains("When a one-compartment model is not appropriate"), "{message}");
    let readme =
        std::fs::read_to_string(PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("README.md")).unwrap();
    assert!(readme.contains("\n## When a one-compartment model is not appropriate\n"));
    // The estimated volume moves with the weighting in every subject.
    for s in fit["subjects"].as_array().unwrap() {
        assert!(codes(&s["warnings"]).contains(&"weighting_dependent"), "{}", s["warnings"]);
    }
}

#[test]
fn misfit_does_not_fire_on_the_theophylline_data() {
    // R's datasets::Theoph, which Pinheiro & Bates (2000) describe with first-order absorption.
    let fit = open_data_fit("theoph");
    assert!(!codes(&fit["warnings"]).contains(&"model_misfit"), "{}", fit["warnings"]);
    for s in fit["subjects"].as_array().unwrap() {
        assert!(!codes(&s["warnings"]).contains(&"model_misfit"), "{}", s["warnings"]);
    }
}

/// One simulated study like the indomethacin design: six subjects, a 25 mg bolus, eleven
/// levels from 0.25 to 8 h, 10 % proportional error plus 0.02 mg/L. `two` makes the curve
/// two-exponential (a distribution phase with a 0.35 h half-life carrying 60 % of the initial
/// concentration); otherwise it is one-compartment (CL 8 L/h, V 20 L, CV 30 % each).
fn study(rng: &mut StdRng, two: bool) -> Vec<SubjectData> {
    let normal = Normal::new(0.0, 1.0).unwrap();
    let times = [0.25, 0.5, 0.75, 1.0, 1.25, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0];
    let doses = vec![Dose { time_h: 0.0, amount_mg: 25.0, route: Route::Bolus, duration_h: 0.0 }];
    (0..6)
        .map(|i| {
            let cl = 8.0 * (0.3 * normal.sample(rng)).exp();
            let v = 20.0 * (0.3 * normal.sample(rng)).exp();
            let one = cistern::engine::concentrations(&Params::iv(cl, v), &doses, &times);
            let levels = times
                .iter()
                .zip(one)
                .map(|(&t, c)| {
                    let c = if two { c + 1.5 * 25.0 / v * (-2.0 * t).exp() } else { c };
                    let sd = (0.02f64.powi(2) + (0.1 * c).powi(2)).sqrt();
                    let y = (c + sd * normal.sample(rng)).max(0.001);
                    Level { time_h: t, conc_mg_l: Some(y), lloq_mg_l: None, line: 0 }
                })
                .collect();
            SubjectData {
                id: Some(format!("S{i}")),
                doses: doses.clone(),
                levels,
                covariates: Covariates::default(),
            }
        })
        .collect()
}

/// The population the one-compartment studies are drawn from (CV 30.7 % is ω = 0.3), the prior
/// of the map fits.
const TRUE_MODEL: &str = "[drug]\nname = \"simulated\"\n[clearance]\ntypical_l_h = 8.0\nbsv_cv = 0.3069\n\
[volume]\ntypical_l = 20.0\nbsv_cv = 0.3069\n[residual]\nadditive_mg_l = 0.02\nproportional_cv = 0.1\n";

/// The true population, or (`off`) a prior whose typical clearance is 1.5-fold too high and
/// typical volume 1.5-fold too low, as a prior taken from another population may be.
fn prior(off: bool) -> PopulationModel {
    let text = if off {
        TRUE_MODEL
            .replace("typical_l_h = 8.0", "typical_l_h = 12.0")
            .replace("typical_l = 20.0", "typical_l = 13.333")
    } else {
        TRUE_MODEL.to_string()
    };
    assert_eq!(off, text != TRUE_MODEL);
    PopulationModel::parse(&TomlText::new("prior.toml", &text)).expect("the prior")
}

/// The shares of simulated studies on which `model_misfit` fires (subject or study level) and
/// on which `weighting_dependent` fires, fitting by `method` (map against `prior`).
fn warning_rates(
    options: &FitOptions,
    prior: Option<&PopulationModel>,
    two: bool,
    studies: usize,
    seed: u64,
) -> (f64, f64) {
    let mut rng = StdRng::seed_from_u64(seed);
    let (mut misfit, mut weighting) = (0, 0);
    for _ in 0..studies {
        let subjects = study(&mut rng, two);
        let mut fits: Vec<_> = fit_all(&subjects, prior, options).into_iter().map(Result::unwrap).collect();
        let refs: Vec<&SubjectData> = subjects.iter().collect();
        let d = for_fits(&refs, &mut fits, prior, options, SIMULATIONS);
        let fired = |code: Code| {
            d.warnings.iter().chain(fits.iter().flat_map(|f| &f.warnings)).any(|w| w.code == code)
        };
        misfit += usize::from(fired(Code::ModelMisfit));
        weighting += usize::from(fired(Code::WeightingDependent));
    }
    (misfit as f64 / studies as f64, weighting as f64 / studies as f64)
}

#[test]
fn misfit_fires_on_most_two_compartment_studies_fitted_by_map() {
    // A quick version of the calibration below (40 studies each, other seeds): map with the
    // true population as prior.
    let (truth, map) = (prior(false), FitOptions::default());
    let (one, _) = warning_rates(&map, Some(&truth), false, 40, 7);
    let (two, _) = warning_rates(&map, Some(&truth), true, 40, 8);
    assert!(one <= 0.05, "false alarms {one}");
    // Before the serial-correlation test it fired on 46.5 % of the calibration's studies.
    assert!(two >= 0.7, "power {two}");
}

#[test]
#[ignore = "calibration study, a few minutes; its rates are in docs/methods.md, section 12.4"]
fn misfit_calibration() {
    let (truth, off) = (prior(false), prior(true));
    let wls = FitOptions { method: Method::Wls, ..FitOptions::default() };
    let wls_y2 = FitOptions { weighting: Weighting::InvY2, ..wls.clone() };
    let map = FitOptions::default();
    let cases = [
        ("wls", &wls, None),
        ("wls, 1/y^2", &wls_y2, None),
        ("map, the true population as prior", &map, Some(&truth)),
        ("map, a prior 1.5-fold off", &map, Some(&off)),
    ];
    for (name, options, prior) in cases {
        let (one, weighting) = warning_rates(options, prior, false, 400, 20261203);
        let (two, _) = warning_rates(options, prior, true, 400, 20261204);
        println!(
            "{name}: model_misfit fires on {:.1} % of one-compartment and {:.1} % of two-compartment studies; \
             weighting_dependent on {:.1} % of one-compartment studies",
            100.0 * one,
            100.0 * two,
            100.0 * weighting
        );
        assert!(one <= 0.05, "{name}: false alarms {one}");
        assert!(weighting <= 0.05, "{name}: weighting_dependent false alarms {weighting}");
        assert!(two > 0.5, "{name}: power {two}");
    }
}
