//! Per-level diagnostics: CWRES and NPDE against an independent numpy/scipy implementation of
//! the published definitions (tests/reference/diagnostics/), NPDE standard normal under the
//! true model, the CSV through the binary, and determinism whatever the thread count.

use crate::common::{assert_rel, ran};
use cistern::diagnostics::residuals::{Typical, cwres, npde};
use cistern::engine::Params;
use cistern::fit::objective::Fixed;
use cistern::io::levels::Level;
use cistern::model::Residual;
use cistern::{Dose, Route};
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use serde_json::Value;
use statrs::distribution::{ContinuousCDF, Normal};
use std::path::PathBuf;

fn reference() -> Value {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/diagnostics/values.json");
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap()
}

fn numbers(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(num).collect()
}

/// The reference case as the library sees it: (typical, doses, levels, mode).
fn case(r: &Value) -> (Typical, Vec<Dose>, Vec<Level>, [f64; 3]) {
    let doses = r["doses"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| Dose {
            time_h: num(&d["time_h"]),
            amount_mg: num(&d["amount_mg"]),
            route: Route::Bolus,
            duration_h: 0.0,
        })
        .collect();
    let levels = numbers(&r["times_h"])
        .into_iter()
        .zip(numbers(&r["observed_mg_l"]))
        .map(|(time_h, y)| Level { time_h, conc_mg_l: Some(y), lloq_mg_l: None, line: 0 })
        .collect();
    let o: Vec<Vec<f64>> = r["omega"].as_array().unwrap().iter().map(numbers).collect();
    let typical = Typical {
        mean: [num(&r["typical_cl_l_h"]).ln(), num(&r["typical_v_l"]).ln(), 0.0],
        omega: [[o[0][0], o[0][1], 0.0], [o[1][0], o[1][1], 0.0], [0.0, 0.0, 0.0]],
        residual: Residual {
            additive_mg_l: num(&r["additive_mg_l"]),
            proportional_cv: num(&r["proportional_cv"]),
        },
        fixed: Fixed { n: 2, ka_per_h: None, f: 1.0, tlag_h: 0.0 },
    };
    let mode = [num(&r["mode_cl_l_h"]).ln(), num(&r["mode_v_l"]).ln(), 0.0];
    (typical, doses, levels, mode)
}

#[test]
fn cwres_and_pred_equal_the_independent_implementation() {
    let r = reference();
    let (typical, doses, levels, mode) = case(&r);
    let ours = cwres(&typical, &doses, &levels, &mode);
    for (i, (c, expected)) in ours.iter().zip(numbers(&r["cwres"])).enumerate() {
        assert_rel(c.expect("a quantified level has a CWRES"), expected, 1e-6, 0.0, &format!("CWRES {i}"));
    }
    let pred = typical.predictions(&doses, &levels, &typical.mean);
    for (i, (p, expected)) in pred.iter().zip(numbers(&r["pred_mg_l"])).enumerate() {
        assert_rel(*p, expected, 1e-12, 0.0, &format!("PRED {i}"));
    }
}

#[test]
fn npde_equal_the_independent_implementation_within_monte_carlo_error() {
    // The reference took 400,000 simulations; ours 20,000. The Monte-Carlo SE of npde is
    // √(p(1 − p)/K)/φ(npde) for the counting alone; the bound is 5 of those, which also
    // covers the error of the simulated mean and covariance at this K.
    let r = reference();
    let (typical, doses, levels, _) = case(&r);
    let k = 20_000;
    let ours = npde(&typical, &doses, &levels, k, 11);
    let normal = Normal::new(0.0, 1.0).unwrap();
    for (i, (x, expected)) in ours.iter().zip(numbers(&r["npde"])).enumerate() {
        let p = normal.cdf(expected);
        let se = (p * (1.0 - p) / k as f64).sqrt() / (-0.5 * expected * expected).exp()
            * (2.0 * std::f64::consts::PI).sqrt();
        let x = x.expect("every level has an NPDE");
        assert!((x - expected).abs() <= 5.0 * se, "NPDE {i}: {x} against {expected} (SE {se:.4})");
    }
}

#[test]
fn npde_are_standard_normal_under_the_true_model() {
    // 400 invented subjects, each with its own sampling times, simulated from the model the
    // NPDE are computed against: a Kolmogorov–Smirnov test must not reject normality at 1 %
    // (critical value 1.628/√N, the asymptotic Kolmogorov distribution).
    let r = reference();
    let (typical, doses, _, _) = case(&r);
    let mut rng = StdRng::seed_from_u64(20261203);
    let normal = Normal::new(0.0, 1.0).unwrap();
    let omega = typical.omega;
    let l = [[omega[0][0].sqrt(), 0.0], [omega[0][1] / omega[0][0].sqrt(), 0.0]];
    let l11 = (omega[1][1] - l[1][0] * l[1][0]).sqrt();
    let mut all = Vec::new();
    for subject in 0..400 {
        let z = [normal.sample(&mut rng), normal.sample(&mut rng)];
        let theta = [typical.mean[0] + l[0][0] * z[0], typical.mean[1] + l[1][0] * z[0] + l11 * z[1]];
        let times: Vec<f64> = (0..5).map(|j| 0.5 + 4.5 * j as f64 + (subject % 7) as f64 * 0.3).collect();
        let truth = Params::iv(theta[0].exp(), theta[1].exp());
        let f = cistern::engine::concentrations(&truth, &doses, &times);
        let levels: Vec<Level> = times
            .iter()
            .zip(f)
            .map(|(&time_h, f)| {
                let y = f + typical.residual.variance(f).sqrt() * normal.sample(&mut rng);
                Level { time_h, conc_mg_l: Some(y), lloq_mg_l: None, line: 0 }
            })
            .collect();
        all.extend(npde(&typical, &doses, &levels, 1000, subject).into_iter().map(Option::unwrap));
    }
    all.sort_by(f64::total_cmp);
    let n = all.len() as f64;
    let d = all.iter().enumerate().fold(0.0f64, |d, (i, &x)| {
        let c = normal.cdf(x);
        d.max((c - i as f64 / n).abs()).max(((i + 1) as f64 / n - c).abs())
    });
    assert!(d < 1.628 / n.sqrt(), "KS statistic {d:.4} rejects at 1 % (N = {n})");
}

fn demo_fit(threads: &str, out: &std::path::Path) -> crate::common::Ran {
    let demo = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("demo-regimens");
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.env("RAYON_NUM_THREADS", threads).arg("fit");
    for f in ["doses", "levels", "covariates"] {
        command.arg(format!("--{f}")).arg(demo.join(format!("{f}.csv")));
    }
    command.arg("--model").arg(demo.join("model.toml"));
    command.args(["--format", "json", "--diagnostics-out"]).arg(out);
    ran(command)
}

#[test]
fn fit_writes_one_diagnostics_row_per_level_the_same_whatever_the_thread_count() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (dir.path().join("one.csv"), dir.path().join("two.csv"));
    let (one, two) = (demo_fit("1", &a), demo_fit("2", &b));
    assert_eq!(one.code, 0, "{}", one.stderr);
    assert_eq!(one.stdout, two.stdout);
    let text = std::fs::read_to_string(&a).unwrap();
    assert_eq!(text, std::fs::read_to_string(&b).unwrap());
    let mut lines = text.lines();
    assert_eq!(
        lines.next().unwrap(),
        "subject,time_h,time_after_dose_h,observed_mg_l,lloq_mg_l,blq,pred_mg_l,ipred_mg_l,iwres,cwres,npde"
    );
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    let json: Value = serde_json::from_str(&one.stdout).unwrap();
    let levels: usize =
        json["subjects"].as_array().unwrap().iter().map(|s| s["levels"].as_array().unwrap().len()).sum();
    assert_eq!(rows.len(), levels);
    assert_eq!(json["diagnostics"]["levels"], levels);
    // IPRED is the fit's own prediction; a level below the limit has no IWRES or CWRES but an NPDE.
    let first = &json["subjects"][0]["levels"][0];
    assert_rel(rows[0][7].parse().unwrap(), num(&first["predicted_mg_l"]), 1e-12, 0.0, "IPRED");
    for r in &rows {
        let blq = r[5] == "true";
        assert_eq!(r[8].is_empty(), blq, "{r:?}");
        assert_eq!(r[9].is_empty(), blq, "{r:?}");
        assert!(!r[10].is_empty(), "{r:?}");
    }
    assert!(rows.iter().any(|r| r[5] == "true"), "the demo has a level below the limit");
    let npde: Vec<f64> = rows.iter().map(|r| r[10].parse().unwrap()).collect();
    let mean = npde.iter().sum::<f64>() / npde.len() as f64;
    assert_rel(num(&json["diagnostics"]["npde"]["mean"]), mean, 1e-12, 0.0, "NPDE mean in the JSON");
}

#[test]
fn population_writes_diagnostics_against_the_estimated_model() {
    // R's Theoph (tests/reference/population/theoph), first-order absorption: one row per
    // level, every level with PRED, CWRES and NPDE, their summary in the JSON, warnings as
    // {code, message} objects and no misfit warning.
    let r = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/population/theoph");
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("diagnostics.csv");
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.arg("population").arg("--model").arg(r.join("start_model.toml"));
    for f in ["doses", "levels", "covariates"] {
        command.arg(format!("--{f}")).arg(r.join(format!("{f}.csv")));
    }
    command.args(["--format", "json", "-q", "--diagnostics-out"]).arg(&out);
    let ran = ran(command);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let json: Value = serde_json::from_str(&ran.stdout).unwrap();
    let text = std::fs::read_to_string(&out).unwrap();
    let rows: Vec<Vec<&str>> = text.lines().skip(1).map(|l| l.split(',').collect()).collect();
    assert_eq!(rows.len(), json["objective"]["n_observations"].as_u64().unwrap() as usize);
    assert_eq!(json["diagnostics"]["cwres"]["count"].as_u64().unwrap() as usize, rows.len());
    assert!(rows.iter().all(|r| !r[6].is_empty() && !r[9].is_empty() && !r[10].is_empty()));
    for w in json["warnings"].as_array().unwrap() {
        assert!(w["code"].is_string() && w["message"].is_string(), "{w}");
        assert_ne!(w["code"], "model_misfit", "{w}");
    }
    // At the estimate the CWRES and NPDE are centred and of unit spread, within what 132
    // levels of 12 subjects allow.
    for key in ["cwres", "npde"] {
        let m = &json["diagnostics"][key];
        assert!(num(&m["mean"]).abs() < 0.25, "{key}: {m}");
        assert!((num(&m["sd"]) - 1.0).abs() < 0.2, "{key}: {m}");
    }
}
