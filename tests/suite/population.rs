//! `cistern population`: the exact likelihood against brute-force integrals, the theophylline
//! data against R's nlme, the round trip of the fitted model through `fit`, a simulation–
//! estimation study, and bad input. The reference values are committed in
//! tests/reference/population/ (scripts and README there); CI needs neither Python nor R.

use crate::common::{Ran, assert_rel, ran};
use cistern::engine::{Params, concentrations};
use cistern::fit::SubjectData;
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::population::{Method, Options, estimate};
use cistern::{Covariates, Dose, PopulationModel, Route};
use rand::distr::Distribution;
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use serde_json::Value;
use statrs::distribution::Normal;
use std::path::{Path, PathBuf};

fn reference() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/population")
}

fn json_of(path: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(path).expect("the reference file")).expect("JSON")
}

/// Run `cistern population` on a directory holding doses.csv, levels.csv, covariates.csv (when
/// present), with `model` and extra arguments.
fn population(dir: &Path, model: &Path, extra: &[&str]) -> Ran {
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.arg("population").arg("--model").arg(model);
    command.arg("--doses").arg(dir.join("doses.csv")).arg("--levels").arg(dir.join("levels.csv"));
    if dir.join("covariates.csv").exists() {
        command.arg("--covariates").arg(dir.join("covariates.csv"));
    }
    command.args(extra);
    ran(command)
}

fn output(r: &Ran) -> Value {
    assert_eq!(r.code, 0, "{}", r.stderr);
    serde_json::from_str(&r.stdout).expect("JSON output")
}

fn number(v: &Value, path: &[&str]) -> f64 {
    let mut v = v;
    for key in path {
        v = &v[*key];
    }
    v.as_f64().unwrap_or_else(|| panic!("{path:?} is a number"))
}

#[test]
fn quadrature_equals_the_brute_force_integral_on_every_reference_case() {
    let values = json_of(&reference().join("likelihood.json"));
    let cases = values["cases"].as_object().expect("cases");
    assert_eq!(cases.len(), 5);
    for (name, case) in cases {
        let dir = reference().join("cases").join(name);
        let out = output(&population(&dir, &dir.join("model.toml"), &["--evaluate", "--format", "json"]));
        let want = number(case, &["total_minus2ll"]);
        let got = number(&out, &["objective", "minus2ll"]);
        // The check: 1e-6 relative.
        assert_rel(got, want, 1e-6, 1.0, &format!("{name}: -2LL by quadrature"));
        // And 1e-6 absolute: with rules chosen per principal axis every case is within 2.4e-7
        // (with one rule size for all axes several_oral, whose posterior is bent by a level near
        // its limit, was 1.1e-5 off).
        assert!((got - want).abs() <= 1e-6, "{name}: {got} vs {want}");
        // Laplace differs from the exact value by far more than the quadrature's error.
        let laplace = output(&population(
            &dir,
            &dir.join("model.toml"),
            &["--evaluate", "--method", "laplace", "--format", "json"],
        ));
        let l = number(&laplace, &["objective", "minus2ll"]);
        assert!(
            (l - want).abs() > 10.0 * (got - want).abs(),
            "{name}: laplace {l}, exact {want}, quadrature {got}"
        );
    }
}

#[test]
fn theophylline_exact_likelihood_at_nlmes_estimates_matches_the_brute_force_integral() {
    let dir = reference().join("theoph");
    let nlme = json_of(&dir.join("nlme.json"));
    let out = output(&population(&dir, &dir.join("nlme_model.toml"), &["--evaluate", "--format", "json"]));
    assert_rel(
        number(&out, &["objective", "minus2ll"]),
        number(&nlme, &["exact_minus2ll_at_nlme_estimates"]),
        1e-8,
        1.0,
        "exact -2LL at nlme's estimates",
    );
}

#[test]
fn theophylline_estimates_agree_with_nlme_and_fit_at_least_as_well() {
    let dir = reference().join("theoph");
    let nlme = json_of(&dir.join("nlme.json"));
    let scratch = tempfile::tempdir().expect("a scratch directory");
    let fitted = scratch.path().join("fitted.toml");
    let out = output(&population(
        &dir,
        &dir.join("start_model.toml"),
        &["--format", "json", "--model-out", fitted.to_str().unwrap()],
    ));
    assert_eq!(out["converged"], Value::Bool(true), "{out}");
    // The default rules, chosen at the estimate, give the objective to 1e-6: the largest rule
    // (40 nodes per random effect, 64,000 points per subject) at the same values agrees. Rules
    // chosen at the start model instead were 7e-6 off here.
    let largest = output(&population(&dir, &fitted, &["--evaluate", "--nodes", "40", "--format", "json"]));
    let (got, exact) =
        (number(&out, &["objective", "minus2ll"]), number(&largest, &["objective", "minus2ll"]));
    assert!((got - exact).abs() <= 1e-6, "-2LL {got} with the default rules, {exact} with 40 nodes");
    for key in ["cl_l_h", "v_l", "ka_per_h"] {
        assert_rel(
            number(&out, &["typical", key, "value"]),
            number(&nlme, &["typical", key]),
            0.02,
            1e-9,
            &format!("typical {key} against nlme"),
        );
    }
    // Variabilities as ω (SD of η): within 15 %.
    for (ours, theirs) in [("cl_cv", "lCl"), ("v_cv", "lV"), ("ka_cv", "lKa")] {
        let cv = number(&out, &["bsv", ours, "value"]);
        assert_rel(cv.powi(2).ln_1p().sqrt(), number(&nlme, &["random_effect_sd", theirs]), 0.15, 1e-9, ours);
    }
    assert_rel(
        number(&out, &["residual", "additive_mg_l", "value"]),
        number(&nlme, &["residual_sd_mg_l"]),
        0.15,
        1e-9,
        "residual SD",
    );
    // An exact optimiser does at least as well on the exact likelihood as nlme's estimates.
    assert!(
        number(&out, &["objective", "minus2ll"]) <= number(&nlme, &["exact_minus2ll_at_nlme_estimates"]),
        "{out}"
    );
    // Standard errors exist and every estimate has its interval around it.
    for object in ["typical", "bsv", "residual"] {
        for (key, e) in out[object].as_object().expect("object") {
            let v = number(e, &["value"]);
            let ci = e["ci95"].as_array().expect("an interval");
            let (lo, hi) = (ci[0].as_f64().unwrap(), ci[1].as_f64().unwrap());
            assert!(lo < v && v < hi && number(e, &["se"]) > 0.0, "{object}.{key}: {e}");
        }
    }
}

#[test]
fn the_fitted_model_read_by_fit_gives_the_same_individual_estimates() {
    let dir = reference().join("theoph");
    let tmp = tempfile::tempdir().unwrap();
    let fitted = tmp.path().join("fitted.toml");
    let out = output(&population(
        &dir,
        &dir.join("start_model.toml"),
        &["--format", "json", "--nodes", "7", "--model-out", fitted.to_str().unwrap()],
    ));
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command
        .args(["fit", "--method", "map", "--intervals", "none", "--format", "json", "--model"])
        .arg(&fitted);
    command.arg("--doses").arg(dir.join("doses.csv")).arg("--levels").arg(dir.join("levels.csv"));
    let fit = ran(command);
    assert_eq!(fit.code, 0, "{}", fit.stderr);
    let fit: Value = serde_json::from_str(&fit.stdout).unwrap();
    let ours = out["subjects"].as_array().unwrap();
    let theirs = fit["subjects"].as_array().unwrap();
    assert_eq!(ours.len(), 12);
    for (a, b) in ours.iter().zip(theirs) {
        assert_eq!(a["subject"], b["subject"]);
        for key in ["cl_l_h", "v_l", "ka_per_h"] {
            assert_rel(
                number(a, &[key]),
                number(b, &["estimates", key, "value"]),
                1e-8,
                1e-12,
                &format!("{} {key}", a["subject"]),
            );
        }
    }
}

/// An invented population with a creatinine-clearance effect on CL: one or two 1-hour
/// infusions, two or three levels per subject at random times, combined residual error, levels
/// under 2 mg/L reported below the limit.
fn simulated_study(seed: u64, subjects: usize, truth: &PopulationModel) -> Vec<SubjectData> {
    let mut rng = StdRng::seed_from_u64(seed);
    let normal = Normal::new(0.0, 1.0).unwrap();
    let factor = truth.omega_factor();
    (0..subjects)
        .map(|i| {
            let crcl = rng.random_range(30.0..130.0);
            let mut covariates = Covariates::default();
            covariates.set("crcl_ml_min", crcl);
            let z = [normal.sample(&mut rng), normal.sample(&mut rng)];
            let eta = [factor[0][0] * z[0], factor[1][0] * z[0] + factor[1][1] * z[1]];
            let (cl, v) = truth.typical_cl_v(&covariates).unwrap();
            let params = Params::iv(cl * eta[0].exp(), v * eta[1].exp());
            let doses: Vec<Dose> = (0..rng.random_range(1..=2))
                .map(|d| Dose {
                    time_h: 12.0 * d as f64,
                    amount_mg: 1000.0,
                    route: Route::Infusion,
                    duration_h: 1.0,
                })
                .collect();
            let last = doses.last().unwrap().time_h;
            let mut times: Vec<f64> =
                (0..rng.random_range(2..=3)).map(|_| last + rng.random_range(1.5..24.0)).collect();
            times.sort_by(f64::total_cmp);
            times.dedup();
            let levels = times
                .iter()
                .zip(concentrations(&params, &doses, &times))
                .map(|(&time_h, f)| {
                    let sd = truth.residual.variance(f).sqrt();
                    let y = f + sd * normal.sample(&mut rng);
                    let blq = y < 2.0;
                    Level { time_h, conc_mg_l: (!blq).then_some(y), lloq_mg_l: blq.then_some(2.0), line: 0 }
                })
                .collect();
            SubjectData { id: Some(format!("V{i:03}")), doses, levels, covariates }
        })
        .collect()
}

const TRUE_MODEL: &str = "
[clearance]
typical_l_h = 4.0
bsv_cv = 0.3
[[clearance.covariates]]
covariate = \"crcl_ml_min\"
form = \"power\"
reference = 80.0
effect = 0.75
[volume]
typical_l = 50.0
bsv_cv = 0.25
[residual]
additive_mg_l = 0.5
proportional_cv = 0.1
";

/// The start: every value off the truth.
const START_MODEL: &str = "
[clearance]
typical_l_h = 3.0
bsv_cv = 0.5
[[clearance.covariates]]
covariate = \"crcl_ml_min\"
form = \"power\"
reference = 80.0
effect = 0.3
[volume]
typical_l = 70.0
bsv_cv = 0.4
[residual]
additive_mg_l = 1.0
proportional_cv = 0.2
";

/// The mean relative error of each typical value and variability over `replicates` simulated
/// studies of `subjects`, and how often the 95 % intervals of the typical values cover the truth.
fn simulation_estimation(method: Method, replicates: u64, subjects: usize) -> (Vec<(String, f64)>, f64) {
    let truth = PopulationModel::parse(&TomlText::new("truth.toml", TRUE_MODEL)).unwrap();
    let start = PopulationModel::parse(&TomlText::new("start.toml", START_MODEL)).unwrap();
    let options = Options { method, nodes: Some(7), ..Options::default() };
    let targets = [
        ("typical", "cl_l_h", 4.0),
        ("typical", "v_l", 50.0),
        ("typical", "cl_crcl_ml_min_effect", 0.75),
        ("bsv", "cl_cv", 0.3),
        ("bsv", "v_cv", 0.25),
    ];
    let mut errors = vec![0.0; targets.len()];
    let (mut covered, mut intervals) = (0, 0);
    for r in 0..replicates {
        let study = simulated_study(1000 + r, subjects, &truth);
        let result = estimate(&study, &start, &options).expect("the estimation runs");
        assert!(result.converged, "replicate {r}: {:?}", result.convergence);
        let json = serde_json::to_value(&result).unwrap();
        for (k, (object, key, want)) in targets.iter().enumerate() {
            let e = &json[*object][*key];
            errors[k] += (number(e, &["value"]) - want) / want / replicates as f64;
            if *object == "typical" {
                let ci = e["ci95"].as_array().expect("an interval");
                intervals += 1;
                covered += usize::from(ci[0].as_f64().unwrap() <= *want && *want <= ci[1].as_f64().unwrap());
            }
        }
    }
    let named = targets.iter().zip(errors).map(|((o, k, _), e)| (format!("{o}.{k}"), e)).collect();
    (named, covered as f64 / intervals as f64)
}

#[test]
fn simulation_estimation_recovers_the_population_quickly() {
    // The quick version: 4 studies of 200 subjects. Typical values within ±5 % on average
    // (±3 % is the full study's criterion, docs/methods.md), variabilities within ±15 %.
    let (errors, _) = simulation_estimation(Method::Quadrature, 4, 200);
    for (name, e) in errors {
        let bound = if name.starts_with("bsv") { 0.15 } else { 0.05 };
        assert!(e.abs() <= bound, "{name}: mean relative error {e:.4}");
    }
}

#[test]
#[ignore = "the full simulation–estimation study (about a minute per method); figures in docs/methods.md"]
fn simulation_estimation_full_study() {
    for method in [Method::Quadrature, Method::Laplace] {
        let (errors, coverage) = simulation_estimation(method, 50, 200);
        println!("{method}: coverage of the typical values' 95 % intervals {coverage:.3}");
        for (name, e) in &errors {
            println!("{method}: {name} mean relative error {e:+.4}");
        }
        if method == Method::Quadrature {
            for (name, e) in &errors {
                let bound = if name.starts_with("bsv") { 0.10 } else { 0.03 };
                assert!(e.abs() <= bound, "{name}: mean relative error {e:.4}");
            }
            assert!((0.90..=0.99).contains(&coverage), "coverage {coverage}");
        }
    }
}

#[test]
fn nodes_placed_again_beyond_the_memory_budget_give_the_same_estimates_to_the_bit() {
    // Beyond its share of the budget a subject's nodes are placed again at every evaluation
    // instead of held: the same nodes and predictions, so every number must be the same.
    let truth = PopulationModel::parse(&TomlText::new("truth.toml", TRUE_MODEL)).unwrap();
    let start = PopulationModel::parse(&TomlText::new("start.toml", START_MODEL)).unwrap();
    let study = simulated_study(77, 40, &truth);
    let run = |bytes: usize| {
        let options = Options { node_memory_bytes: bytes, ..Options::default() };
        let result = estimate(&study, &start, &options).expect("the estimation runs");
        assert!(result.converged, "{:?}", result.convergence);
        serde_json::to_string(&result).unwrap()
    };
    let held = run(cistern::population::NODE_MEMORY_BYTES);
    // Nothing held, and a budget that holds the subjects with small rules only.
    for bytes in [0, 40 * 60_000] {
        assert_eq!(run(bytes), held, "budget {bytes} bytes");
    }
}

#[test]
fn bootstrap_is_the_same_whatever_the_thread_count() {
    let dir = reference().join("cases").join("several_infusion");
    let args = ["--format", "json", "--nodes", "5", "--bootstrap", "8", "--seed", "3"];
    let run = |threads: &str| {
        let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
        command
            .env("RAYON_NUM_THREADS", threads)
            .arg("population")
            .arg("--model")
            .arg(dir.join("model.toml"));
        for f in ["doses", "levels", "covariates"] {
            command.arg(format!("--{f}")).arg(dir.join(format!("{f}.csv")));
        }
        command.args(args);
        ran(command)
    };
    let (one, two) = (run("1"), run("2"));
    assert_eq!(one.code, 0, "{}", one.stderr);
    assert_eq!(one.stdout, two.stdout);
    let out: Value = serde_json::from_str(&one.stdout).unwrap();
    assert_eq!(out["bootstrap"]["replicates"], 8);
    assert!(out["typical"]["cl_l_h"]["bootstrap_ci95"].is_array(), "{out}");
}

#[test]
fn bad_studies_are_refused_with_exit_code_2_and_nothing_written() {
    let tmp = tempfile::tempdir().unwrap();
    let case = reference().join("cases").join("one_infusion");
    let out = tmp.path().join("fitted.toml");
    let out_flag = out.to_str().unwrap();
    // One subject cannot give a between-subject variability.
    let r = population(&case, &case.join("model.toml"), &["--model-out", out_flag]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("at least 2 subjects"), "{}", r.stderr);
    assert!(!out.exists());
    // Every level below the limit.
    let dir = tmp.path().join("blq");
    std::fs::create_dir(&dir).unwrap();
    std::fs::write(
        dir.join("doses.csv"),
        "subject,time_h,amount_mg,route,duration_h\nA,0,1000,infusion,1\nB,0,1000,infusion,1\n",
    )
    .unwrap();
    std::fs::write(dir.join("levels.csv"), "subject,time_h,conc_mg_l\nA,4,<1\nB,6,<1\n").unwrap();
    let model = reference().join("cases").join("one_infusion").join("model.toml");
    let r = population(&dir, &model, &["--model-out", out_flag]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("below the quantification limit"), "{}", r.stderr);
    assert!(!out.exists());
    // A start model under which the levels are impossible (a proportional-only error and a
    // level before any drug has arrived).
    std::fs::write(dir.join("levels.csv"), "subject,time_h,conc_mg_l\nA,0,5\nA,4,20\nB,6,15\n").unwrap();
    let proportional = tmp.path().join("proportional.toml");
    std::fs::write(
        &proportional,
        "[clearance]\ntypical_l_h = 4\nbsv_cv = 0.3\n[volume]\ntypical_l = 40\nbsv_cv = 0.2\n[residual]\nadditive_mg_l = 0\nproportional_cv = 0.2\n",
    )
    .unwrap();
    let r = population(&dir, &proportional, &["--model-out", out_flag]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("not finite at the start"), "{}", r.stderr);
    assert!(!out.exists());
    // Holding a value the model does not have.
    let held = tmp.path().join("held.toml");
    std::fs::write(
        &held,
        std::fs::read_to_string(&model).unwrap()
            + "\n[estimation]\nhold = [\"absorption.bsv_cv\", \"volume.bsv\"]\n",
    )
    .unwrap();
    let r = population(&reference().join("cases").join("several_infusion"), &held, &[]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("'volume.bsv' is not a value of this model"), "{}", r.stderr);
}

#[test]
fn a_model_the_data_cannot_inform_ends_with_warnings_not_an_error() {
    // Three random effects, their typical values and two residual terms from one level per
    // subject for four subjects: nothing is identified. The run ends (exit code 0), says it did
    // not converge, names what the data do not identify, and warns of the shrinkage.
    let tmp = tempfile::tempdir().unwrap();
    let case = reference().join("cases").join("several_oral");
    std::fs::copy(case.join("doses.csv"), tmp.path().join("doses.csv")).unwrap();
    std::fs::write(
        tmp.path().join("levels.csv"),
        "# Invented: one level per subject of the several_oral case.\nsubject,time_h,conc_mg_l\n\
         R1,6,6.4\nR2,11.5,4.5\nR3,4,11.0\nR4,3,9.4\n",
    )
    .unwrap();
    let out = output(&population(
        tmp.path(),
        &case.join("model.toml"),
        &["--method", "laplace", "--format", "json"],
    ));
    assert_eq!(out["converged"], Value::Bool(false), "{out}");
    let warnings = out["warnings"].to_string();
    for expected in ["did not converge", "do not identify", "absorption.bsv_cv", "η-shrinkage of ka"] {
        assert!(warnings.contains(expected), "{expected}: {warnings}");
    }
}

#[test]
fn held_values_stay_at_the_model_files_values() {
    let dir = reference().join("cases").join("several_infusion");
    let tmp = tempfile::tempdir().unwrap();
    let held = tmp.path().join("held.toml");
    let text = std::fs::read_to_string(dir.join("model.toml")).unwrap();
    std::fs::write(
        &held,
        text + "\n[estimation]\nhold = [\"volume.bsv_cv\", \"clearance.covariates.crcl_ml_min\"]\n",
    )
    .unwrap();
    let out = output(&population(&dir, &held, &["--format", "json", "--nodes", "5"]));
    assert_eq!(out["bsv"]["v_cv"]["held"], Value::Bool(true));
    assert_eq!(number(&out, &["bsv", "v_cv", "value"]), 0.2);
    assert_eq!(number(&out, &["typical", "cl_crcl_ml_min_effect", "value"]), 0.75);
    assert!(out["bsv"]["v_cv"]["se"].is_null());
    // CL, V, the weight effect on V, the variability of CL and the additive error.
    assert_eq!(number(&out, &["objective", "n_parameters"]), 5.0);
}
