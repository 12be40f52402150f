//! `cistern nca`: against an independent implementation on open data (R's Theoph and
//! Indometh, numpy/scipy values committed in tests/reference/), published worked examples,
//! exact identities of the one-compartment curve, Bailer's variance by hand and by simulation,
//! and bad input.

use crate::common::{Ran, assert_abs, assert_published, assert_rel, cistern_at};
use cistern::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::fit::SubjectData;
use cistern::io::levels::Level;
use cistern::nca::auc::AucRule;
use cistern::nca::intervals::BlqRule;
use cistern::nca::sparse::mean_curve;
use cistern::nca::{LambdaZChoice, NcaOptions, analyse};
use proptest::prelude::*;
use serde_json::Value;
use std::path::Path;

/// The scipy version the reference values were computed with (tests/reference/nca_reference.json).
const SCIPY_VERSION: &str = "1.17.1";

fn reference_dir() -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/nca")
}

/// Run `cistern nca ARGS` in a scratch directory.
fn nca(dir: &Path, args: &[&str]) -> Ran {
    let mut all = vec!["nca"];
    all.extend_from_slice(args);
    cistern_at(dir, &all, "0")
}

/// `cistern nca --format json` on files, parsed; panics unless it succeeds.
fn nca_json(dir: &Path, args: &[&str]) -> Value {
    let mut all = args.to_vec();
    all.extend(["--format", "json"]);
    let ran = nca(dir, &all);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    serde_json::from_str(&ran.stdout).expect("the output is JSON")
}

fn write(dir: &Path, name: &str, text: &str) -> String {
    std::fs::write(dir.join(name), text).unwrap();
    name.to_string()
}

fn subject(doses: Vec<Dose>, levels: &[(f64, f64)]) -> SubjectData {
    SubjectData {
        id: Some("S".into()),
        doses,
        levels: levels
            .iter()
            .enumerate()
            .map(|(i, &(t, c))| Level { time_h: t, conc_mg_l: Some(c), lloq_mg_l: None, line: i as u64 + 2 })
            .collect(),
        covariates: Covariates::default(),
    }
}

fn options(auc_rule: AucRule) -> NcaOptions {
    NcaOptions {
        auc_rule,
        blq: BlqRule::ZeroThenDrop,
        lambda_z: LambdaZChoice::Automatic,
        partials: Vec::new(),
        lambda_z_times: Default::default(),
    }
}

fn bolus(time_h: f64, amount_mg: f64) -> Dose {
    Dose { time_h, amount_mg, route: Route::Bolus, duration_h: 0.0 }
}

// ---- An independent implementation on open data ----

#[test]
fn theoph_and_indometh_equal_the_numpy_scipy_reference() {
    // tests/reference/nca_reference.py (numpy and scipy.stats.linregress, sharing no code with
    // cistern) on R's Theoph and Indometh as exported by tests/reference/nca/export_datasets.R.
    let reference: Value = serde_json::from_str(include_str!("../reference/nca_reference.json")).unwrap();
    assert_eq!(reference["scipy"], SCIPY_VERSION, "the reference was regenerated: update SCIPY_VERSION");
    let dir = tempfile::tempdir().unwrap();
    let data = reference_dir();
    let mut compared = 0;
    for case in reference["cases"].as_array().unwrap() {
        let name = case["data"].as_str().unwrap();
        let doses = data.join(format!("{name}_doses.csv"));
        let levels = data.join(format!("{name}_levels.csv"));
        let partial = case["partial_h"].as_array().unwrap();
        let partial = format!("{}..{}", partial[0], partial[1]);
        let mut args = vec![
            "--doses",
            doses.to_str().unwrap(),
            "--levels",
            levels.to_str().unwrap(),
            "--auc-rule",
            case["auc_rule"].as_str().unwrap(),
            "--partial",
            &partial,
        ];
        let window = case["lambda_z_window_h"].as_array().map(|w| format!("{}..{}", w[0], w[1]));
        if let Some(w) = &window {
            args.extend(["--lambda-z-window", w]);
        }
        let out = nca_json(dir.path(), &args);
        let rows = out["subjects"].as_array().unwrap();
        let expected = case["subjects"].as_object().unwrap();
        assert_eq!(rows.len(), expected.len());
        for row in rows {
            let id = row["subject"].as_str().unwrap();
            for (key, want) in expected[id].as_object().unwrap() {
                let got = if key == "partial_auc_mg_h_l" {
                    &row["partial_aucs"][0]["auc_mg_h_l"]
                } else {
                    &row[key]
                };
                let what = format!("{name} {} {id} {key}", case["auc_rule"]);
                match want.as_f64() {
                    Some(w) => assert_rel(got.as_f64().unwrap_or(f64::NAN), w, 1e-9, 1e-12, &what),
                    None => assert!(got.is_null(), "{what}: expected none, got {got}"),
                }
                compared += 1;
            }
        }
    }
    assert!(compared > 1000, "{compared} values compared");
}

// ---- Published worked examples (Bourne, Basic Pharmacokinetics course notes, University of
// Oklahoma, PHAR 7633; ../shared/reference-cases.md) ----

/// One subject's JSON result for levels given as (time, text) after one dose.
fn one(dose: &str, levels: &[(f64, &str)], args: &[&str]) -> Value {
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", &format!("time_h,amount_mg,route\n{dose}\n"));
    let mut text = String::from("time_h,conc_mg_l\n");
    for (t, c) in levels {
        text += &format!("{t},{c}\n");
    }
    let l = write(dir.path(), "l.csv", &text);
    let mut all = vec!["--doses", d.as_str(), "--levels", l.as_str()];
    all.extend_from_slice(args);
    nca_json(dir.path(), &all)["subjects"][0].clone()
}

fn number(v: &Value, key: &str) -> f64 {
    v[key].as_f64().unwrap_or_else(|| panic!("{key} is missing in {v}"))
}

fn partial(v: &Value, i: usize) -> f64 {
    v["partial_aucs"][i]["auc_mg_h_l"].as_f64().unwrap()
}

#[test]
fn bourne_homework_1997_p2_trapezoid_pieces_tail_and_auc_to_infinity() {
    // 500 mg bolus; the printed back-extrapolated C0 = 47.6 mg/L given as the level at 0 h.
    let levels = [(0.0, "47.6"), (1.0, "30"), (2.0, "20"), (6.0, "3.8"), (12.0, "0.26")];
    let pieces =
        ["--partial", "0h..1h", "--partial", "1h..2h", "--partial", "2h..6h", "--partial", "6h..12h"];
    let mut args = vec!["--auc-rule", "linear", "--lambda-z-window", "1h..12h"];
    args.extend(pieces);
    let linear = one("0,500,bolus", &levels, &args);
    // The printed pieces, k and AUC0–∞, and the derived log-down areas: the values and
    // tolerances of `cistern verify`'s catalogue (src/verify.rs; reference-cases.md case 2).
    for (i, piece) in ["0–1 h", "1–2 h", "2–6 h", "6–12 h"].into_iter().enumerate() {
        let name = format!("NCA, bolus, linear trapezoid {piece}");
        assert_published(partial(&linear, i), &name, "trapezoid piece");
    }
    assert_published(number(&linear, "lambda_z_per_h"), "NCA, bolus, λz through the levels 1–12 h", "k");
    // The printed tail, 0.6 (not in the catalogue).
    assert_abs(number(&linear, "auc_inf_obs_mg_h_l") - number(&linear, "auc_last_mg_h_l"), 0.6, 0.05, "tail");
    assert_published(number(&linear, "auc_inf_obs_mg_h_l"), "NCA, bolus, AUC0–∞ (linear)", "AUC0–∞, linear");
    let log = one("0,500,bolus", &levels, &["--lambda-z-window", "1h..12h"]);
    let name = "NCA, bolus, AUC0–12 (linear-up/log-down)";
    assert_published(number(&log, "auc_last_mg_h_l"), name, "AUC0–12, log-down");
    let name = "NCA, bolus, AUC0–∞ (linear-up/log-down)";
    assert_published(number(&log, "auc_inf_obs_mg_h_l"), name, "AUC0–∞, log-down");
}

#[test]
fn bourne_homework_1995_p2_slope_and_auc_to_infinity() {
    // 300 mg bolus; printed C0 = 18.6 given as the level at 0 h.
    let levels = [(0.0, "18.6"), (1.0, "15.7"), (2.0, "13.8"), (6.0, "8.3"), (12.0, "3.2")];
    let linear = one("0,300,bolus", &levels, &["--auc-rule", "linear", "--lambda-z-window", "1h..12h"]);
    // The catalogue's k, AUC0–∞ (linear) and derived log-down AUC0–∞ (reference-cases.md
    // case 3), and the printed tail 22.2 (not in the catalogue).
    let name = "NCA, bolus 300 mg, λz through the levels 1–12 h";
    assert_published(number(&linear, "lambda_z_per_h"), name, "k");
    assert_abs(
        number(&linear, "auc_inf_obs_mg_h_l") - number(&linear, "auc_last_mg_h_l"),
        22.2,
        0.05,
        "tail",
    );
    let name = "NCA, bolus 300 mg, AUC0–∞ (linear)";
    assert_published(number(&linear, "auc_inf_obs_mg_h_l"), name, "AUC0–∞, linear");
    let log = one("0,300,bolus", &levels, &["--lambda-z-window", "1h..12h"]);
    let name = "NCA, bolus 300 mg, AUC0–∞ (linear-up/log-down)";
    assert_published(number(&log, "auc_inf_obs_mg_h_l"), name, "AUC0–∞, log-down");
}

#[test]
fn bourne_chapter_9_oral_areas_and_terminal_slope() {
    // Oral data of the method of residuals; C(0) = 0 (no level at the dose time).
    let times = [0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0];
    let conc = ["1.91", "2.98", "3.54", "3.80", "3.84", "3.62", "3.04", "2.49", "2.04", "1.67", "1.37"];
    let levels: Vec<(f64, &str)> = times.into_iter().zip(conc).collect();
    // The derived values of reference-cases.md case 6, as `cistern verify`'s catalogue holds them.
    let linear = one("0,100,oral", &levels, &["--auc-rule", "linear", "--lambda-z-window", "4h..7h"]);
    assert_published(number(&linear, "auc_last_mg_h_l"), "NCA, oral data, AUC0–7 (linear)", "AUC0–7, linear");
    assert_published(number(&linear, "lambda_z_per_h"), "NCA, oral data, λz from the last 4 levels", "λz");
    assert_published(
        number(&linear, "auc_inf_obs_mg_h_l"),
        "NCA, oral data, AUC0–∞ (linear)",
        "AUC0–∞, linear",
    );
    let log = one("0,100,oral", &levels, &["--lambda-z-window", "4h..7h"]);
    let name = "NCA, oral data, AUC0–7 (linear-up/log-down)";
    assert_published(number(&log, "auc_last_mg_h_l"), name, "AUC0–7, log-down");
    let name = "NCA, oral data, AUC0–∞ (linear-up/log-down)";
    assert_published(number(&log, "auc_inf_obs_mg_h_l"), name, "AUC0–∞, log-down");
}

// ---- Exact identities of the one-compartment curve ----

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// After one bolus the levels lie on C0·e^(−kt): the back-extrapolated start, every
    /// logarithmic step and λz are exact, so AUC0–∞ = dose/CL (exact identity) and the area
    /// between two levels is (C(a) − C(b))/k.
    #[test]
    fn a_bolus_sampled_from_the_exact_curve_gives_exact_areas_and_lambda_z(
        cl in 0.5f64..20.0,
        v in 5.0f64..100.0,
        dose in 10.0f64..1000.0,
        mut times in prop::collection::btree_set(1u32..480, 4..10),
    ) {
        let times: Vec<f64> = std::mem::take(&mut times).into_iter().map(|t| f64::from(t) / 10.0).collect();
        let k = cl / v;
        let c = |t: f64| dose / v * (-k * t).exp();
        let levels: Vec<(f64, f64)> = times.iter().map(|&t| (t, c(t))).collect();
        let (a, b) = (times[1], times[times.len() - 2]);
        let mut opts = options(AucRule::LinearUpLogDown);
        opts.partials = vec![(a, b), (0.0, a)];
        let r = &analyse(&[subject(vec![bolus(0.0, dose)], &levels)], &opts)[0];
        assert_rel(r.lambda_z_per_h.unwrap(), k, 1e-9, 0.0, "λz");
        assert_rel(r.auc_inf_obs_mg_h_l.unwrap(), dose / cl, 1e-9, 0.0, "AUC0–∞ = dose/CL");
        assert_rel(r.disposition.values().0.unwrap(), cl, 1e-9, 0.0, "CL");
        assert_rel(r.disposition.values().1.unwrap(), v, 1e-9, 0.0, "Vz = V");
        assert_rel(r.partial_aucs[0].auc_mg_h_l.unwrap(), (c(a) - c(b)) / k, 1e-9, 0.0, "AUC between levels");
        assert_rel(r.partial_aucs[1].auc_mg_h_l.unwrap(), (c(0.0) - c(a)) / k, 1e-9, 0.0, "AUC from the dose");
        // MRT of a bolus is 1/k, and Vss = MRT·CL = V (exact identities).
        assert_rel(r.mrt_h.unwrap(), 1.0 / k, 1e-9, 0.0, "MRT");
        assert_rel(r.disposition.values().2.unwrap(), v, 1e-9, 0.0, "Vss");
    }
}

#[test]
fn the_linear_rule_on_a_densely_sampled_oral_curve_converges_at_the_second_order() {
    // One oral dose, F = 1, D = 100 mg, CL = 4 L/h, V = 40 L, ka = 1/h: the exact area to T is
    // A·[(1 − e^(−kT))/k − (1 − e^(−ka·T))/ka], A = D·ka/(V(ka − k)) (closed form).
    let (dose, cl, v, ka, end) = (100.0, 4.0, 40.0, 1.0, 24.0);
    let k = cl / v;
    let a = dose * ka / (v * (ka - k));
    let c = |t: f64| a * ((-k * t).exp() - (-ka * t).exp());
    let exact = a * ((1.0 - (-k * end).exp()) / k - (1.0 - (-ka * end).exp()) / ka);
    let error = |steps: u32| {
        let levels: Vec<(f64, f64)> =
            (1..=steps).map(|i| f64::from(i) * end / f64::from(steps)).map(|t| (t, c(t))).collect();
        let oral = Dose { time_h: 0.0, amount_mg: dose, route: Route::Oral, duration_h: 0.0 };
        let r = &analyse(&[subject(vec![oral], &levels)], &options(AucRule::Linear))[0];
        (r.auc_last_mg_h_l.unwrap() - exact).abs()
    };
    let (e1, e2, e3) = (error(48), error(96), error(192));
    // Halving the step divides the error of the trapezoid rule by 4 (its error is O(h²)).
    for ratio in [e1 / e2, e2 / e3] {
        assert!((3.9..4.1).contains(&ratio), "error ratio {ratio} ({e1:e}, {e2:e}, {e3:e})");
    }
    assert!(e3 < 1e-3 * exact);
}

#[test]
fn repeated_boluses_give_exact_dosing_interval_areas_and_accumulation() {
    // 100 mg every 12 h, 10 doses, CL = 5 L/h, V = 50 L. By superposition the area over the
    // i-th interval is (D/CL)(1 − e^(−kτi)), so the accumulation against the first dose is
    // (1 − e^(−kτi))/(1 − e^(−kτ)) (closed forms).
    let (dose, cl, v, tau, n) = (100.0, 5.0, 50.0, 12.0, 10);
    let k = cl / v;
    let doses: Vec<Dose> = (0..n).map(|i| bolus(f64::from(i) * tau, dose)).collect();
    // The level just before a time (a dose at that very time not yet given).
    let c = |t: f64| -> f64 {
        doses.iter().filter(|d| d.time_h < t).map(|d| dose / v * (-k * (t - d.time_h)).exp()).sum()
    };
    let mut levels = Vec::new();
    for i in 0..n {
        let start = f64::from(i) * tau;
        let after: &[f64] =
            if i + 1 == n { &[1.0, 2.0, 4.0, 8.0, 12.0, 24.0] } else { &[1.0, 2.0, 4.0, 8.0] };
        levels.extend(after.iter().map(|h| (start + h, c(start + h))));
        if i + 1 < n {
            levels.push((start + tau, c(start + tau)));
        }
    }
    let rows = analyse(&[subject(doses.clone(), &levels)], &options(AucRule::LinearUpLogDown));
    assert_eq!(rows.len(), n as usize);
    let first = (dose / cl) * (1.0 - (-k * tau).exp());
    for r in &rows {
        let i = r.interval as f64;
        let expected = (dose / cl) * (1.0 - (-k * tau * i).exp());
        assert_rel(r.auc_tau_mg_h_l.unwrap(), expected, 1e-9, 0.0, "AUCτ");
        assert_rel(r.cavg_mg_l.unwrap(), expected / tau, 1e-9, 0.0, "Cavg");
        assert_rel(r.lambda_z_per_h.unwrap(), k, 1e-9, 0.0, "λz");
        if r.interval > 1 {
            let start = (i - 1.0) * tau;
            let trough = c(start);
            assert_rel(r.ctrough_mg_l.unwrap(), trough, 1e-12, 0.0, "pre-dose level");
            assert_rel(r.cmin_mg_l.unwrap(), trough, 1e-12, 0.0, "Cmin");
            let peak = c(start + 1.0);
            assert_rel(
                r.fluctuation_pct.unwrap(),
                100.0 * (peak - trough) / (expected / tau),
                1e-9,
                0.0,
                "fluctuation",
            );
            assert_rel(r.swing_pct.unwrap(), 100.0 * (peak - trough) / trough, 1e-9, 0.0, "swing");
            assert_rel(r.accumulation_ratio.unwrap(), expected / first, 1e-9, 0.0, "accumulation");
            // dose/AUCτ is CL at steady state; after 10 doses AUCτ is within e^(−120·k) of it.
            assert_rel(r.disposition.values().0.unwrap(), dose / expected, 1e-9, 0.0, "dose/AUCτ");
        } else {
            assert_rel(r.auc_inf_obs_mg_h_l.unwrap(), dose / cl, 1e-9, 0.0, "first dose AUC0–∞");
        }
    }
    assert_rel(rows[9].disposition.values().0.unwrap(), cl, 1e-5, 0.0, "CL at steady state");
}

// ---- Bailer's method ----

fn sparse_subjects(design: &[(f64, &[f64])]) -> Vec<SubjectData> {
    let oral = Dose { time_h: 0.0, amount_mg: 100.0, route: Route::Oral, duration_h: 0.0 };
    let mut subjects = Vec::new();
    for &(t, values) in design {
        for &c in values {
            let mut s = subject(vec![oral], &[(t, c)]);
            s.id = Some(format!("S{}", subjects.len()));
            subjects.push(s);
        }
    }
    subjects
}

#[test]
fn bailers_variance_equals_a_hand_computation() {
    // Three subjects per time, one level each, after an oral dose (0 at the dose time).
    // Times 0, 0.5, 1, 2, 4: trapezoid weights w = 0.25, 0.5, 0.75, 1.5, 1; means 0, 3, 19/3,
    // 6, 3; so AUC = 0.5·3 + 0.75·19/3 + 1.5·6 + 3 = 18.25. Sample variances 1, 7/3, 1, 1, so
    // Var = (0.25·1 + 0.5625·7/3 + 2.25·1 + 1·1)/3 = 4.8125/3 (by hand).
    let design: [(f64, &[f64]); 4] =
        [(0.5, &[2.0, 3.0, 4.0]), (1.0, &[5.0, 6.0, 8.0]), (2.0, &[6.0, 7.0, 5.0]), (4.0, &[3.0, 2.0, 4.0])];
    let curve = mean_curve(&sparse_subjects(&design), BlqRule::ZeroThenDrop).unwrap();
    assert_rel(curve.auc_last_mg_h_l, 18.25, 1e-14, 0.0, "AUC");
    let se = (4.8125f64 / 3.0).sqrt();
    assert_rel(curve.auc_last_se_mg_h_l.unwrap(), se, 1e-14, 0.0, "SE");
    // 1.959963984540054: the normal quantile of 0.975 (tables).
    let ci = curve.auc_last_ci95.unwrap();
    assert_rel(ci[0], 18.25 - 1.959963984540054 * se, 1e-12, 0.0, "lower");
    assert_rel(ci[1], 18.25 + 1.959963984540054 * se, 1e-12, 0.0, "upper");
    // The peak of the mean curve: 19/3 at 1 h, SE = sqrt(7/3)/sqrt(3).
    assert_rel(curve.cmax_mg_l, 19.0 / 3.0, 1e-14, 0.0, "Cmax");
    assert_rel(curve.cmax_se_mg_l.unwrap(), (7.0f64 / 9.0).sqrt(), 1e-14, 0.0, "Cmax SE");
}

#[test]
fn bailers_interval_covers_the_true_area_95_percent_of_the_time() {
    use rand::SeedableRng;
    use rand::distr::Distribution;
    use rand::rngs::StdRng;
    use statrs::distribution::Normal;
    // The mean curve 10·(e^(−0.2t) − e^(−1.5t)) at 0.5, 1, 2, 4, 8, 12 h, a CV of 30 %, 20
    // subjects per time; the true area is the trapezoid area of the true means (0 at 0 h).
    let times = [0.5, 1.0, 2.0, 4.0, 8.0, 12.0];
    let mean = |t: f64| 10.0 * ((-0.2 * t).exp() - (-1.5 * t).exp());
    let mut grid = vec![(0.0, 0.0)];
    grid.extend(times.iter().map(|&t| (t, mean(t))));
    let truth: f64 = grid.windows(2).map(|w| (w[1].0 - w[0].0) * (w[0].1 + w[1].1) / 2.0).sum();
    let mut rng = StdRng::seed_from_u64(1988);
    let replicates = 2000;
    let mut covered = 0;
    for _ in 0..replicates {
        let draws: Vec<(f64, Vec<f64>)> = times
            .iter()
            .map(|&t| {
                let normal = Normal::new(mean(t), 0.3 * mean(t)).unwrap();
                (t, (0..20).map(|_| normal.sample(&mut rng).max(0.0)).collect())
            })
            .collect();
        let design: Vec<(f64, &[f64])> = draws.iter().map(|(t, v)| (*t, v.as_slice())).collect();
        let curve = mean_curve(&sparse_subjects(&design), BlqRule::ZeroThenDrop).unwrap();
        let [lo, hi] = curve.auc_last_ci95.unwrap();
        covered += usize::from(lo <= truth && truth <= hi);
    }
    let share = covered as f64 / replicates as f64;
    assert!((0.93..=0.97).contains(&share), "coverage {share}");
}

// ---- The command: its contract and bad input ----

#[test]
fn the_json_names_follow_the_contract_for_oral_and_intravenous_doses() {
    let dir = tempfile::tempdir().unwrap();
    let data = reference_dir();
    let run = |name: &str| {
        let d = data.join(format!("{name}_doses.csv"));
        let l = data.join(format!("{name}_levels.csv"));
        nca_json(dir.path(), &["--doses", d.to_str().unwrap(), "--levels", l.to_str().unwrap()])
    };
    let common = [
        "subject",
        "cmax_mg_l",
        "tmax_h",
        "clast_mg_l",
        "tlast_h",
        "auc_last_mg_h_l",
        "lambda_z_per_h",
        "half_life_h",
        "auc_inf_obs_mg_h_l",
        "auc_inf_pred_mg_h_l",
        "auc_extrap_pct",
        "mrt_h",
    ];
    let theoph = run("theoph");
    assert!(theoph["caution"].as_str().is_some());
    for row in theoph["subjects"].as_array().unwrap() {
        for key in common.iter().chain(&["cl_f_l_h", "vz_f_l"]) {
            assert!(row.get(*key).is_some(), "{key} in {row}");
        }
        assert!(row.get("cl_l_h").is_none() && row.get("vz_l").is_none());
    }
    let indometh = run("indometh");
    for row in indometh["subjects"].as_array().unwrap() {
        for key in common.iter().chain(&["cl_l_h", "vz_l", "vss_l"]) {
            assert!(row.get(*key).is_some(), "{key} in {row}");
        }
        assert!(row.get("cl_f_l_h").is_none());
    }
}

#[test]
fn the_table_fits_80_columns_and_carries_the_caution() {
    let dir = tempfile::tempdir().unwrap();
    let data = reference_dir();
    let d = data.join("theoph_doses.csv");
    let l = data.join("theoph_levels.csv");
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command
        .args(["nca", "--doses", d.to_str().unwrap(), "--levels", l.to_str().unwrap(), "--format", "table"])
        .current_dir(dir.path())
        .env("COLUMNS", "80");
    let ran = crate::common::ran(command);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stdout.lines().all(|l| l.chars().count() <= 80), "{}", ran.stdout);
    assert!(crate::common::squeeze(&ran.stdout).contains(&crate::common::squeeze(cistern::CAUTION)));
    assert!(ran.stdout.contains("T12"));
}

#[test]
fn the_sparse_output_gives_the_mean_curve_area_its_se_and_interval() {
    let dir = tempfile::tempdir().unwrap();
    let d = write(
        dir.path(),
        "d.csv",
        "subject,time_h,amount_mg,route\nA,0,100,oral\nB,0,100,oral\nC,0,100,oral\nD,0,100,oral\n",
    );
    let l = write(dir.path(), "l.csv", "subject,time_h,conc_mg_l\nA,1,4\nB,1,6\nC,4,3\nD,4,2\n");
    let out = nca_json(dir.path(), &["--doses", &d, "--levels", &l, "--sparse"]);
    let m = &out["mean_curve"];
    // Means 0 at 0 h, 5 at 1 h, 2.5 at 4 h; weights 0.5, 2, 1.5: AUC = 2·5 + 1.5·2.5 = 13.75
    // (by hand).
    assert_rel(m["auc_last_mg_h_l"].as_f64().unwrap(), 13.75, 1e-14, 0.0, "AUC");
    // Variances 2 and 0.5 over 2 levels each: Var = (4·2 + 2.25·0.5)/2 = 9.125/2 (by hand).
    assert_rel(m["auc_last_se_mg_h_l"].as_f64().unwrap(), (9.125f64 / 2.0).sqrt(), 1e-14, 0.0, "SE");
    assert_eq!(m["auc_last_ci95"].as_array().unwrap().len(), 2);
    assert!(out["population_mean"].as_str().unwrap().contains("not any subject"));
}

#[test]
fn fewer_than_three_levels_after_the_peak_give_no_lambda_z_but_the_other_values() {
    let r = one("0,100,oral", &[(1.0, "2"), (2.0, "5"), (4.0, "3"), (8.0, "1")], &[]);
    assert!(r["lambda_z_per_h"].is_null() && r["auc_inf_obs_mg_h_l"].is_null());
    assert!(r["notes"].to_string().contains("no λz"), "{r}");
    assert_rel(number(&r, "cmax_mg_l"), 5.0, 0.0, 1.0, "Cmax");
    assert!(number(&r, "auc_last_mg_h_l") > 0.0);
}

#[test]
fn all_levels_below_the_limit_give_a_note_and_no_values() {
    let r = one("0,100,oral", &[(1.0, "<0.5"), (2.0, "<0.5"), (4.0, "<0.5")], &[]);
    assert!(r["notes"].to_string().contains("no measurable level"), "{r}");
    assert!(r["auc_last_mg_h_l"].is_null() && r["tlast_h"].is_null());
}

#[test]
fn levels_below_the_limit_count_as_zero_before_the_first_measurable_one_and_are_left_out_after() {
    // Linear rule: 0 at 0 h and at 1 h (below the limit), 4 at 2 h, 2 at 4 h; the one at 6 h
    // is left out, so AUClast = 0 + 2 + 6 = 8.
    let levels = [(1.0, "<0.5"), (2.0, "4"), (4.0, "2"), (6.0, "<0.5")];
    let r = one("0,100,oral", &levels, &["--auc-rule", "linear"]);
    assert_rel(number(&r, "auc_last_mg_h_l"), 8.0, 1e-15, 0.0, "AUClast");
    assert_rel(number(&r, "tlast_h"), 4.0, 0.0, 1.0, "Tlast");
    // Counted as zero everywhere, the last step adds (2 + 0)/2·2 = 2 past Tlast but AUClast
    // stops at Tlast; the partial area to 6 h sees it.
    let zero = one("0,100,oral", &levels, &["--auc-rule", "linear", "--blq", "zero", "--partial", "0h..6h"]);
    assert_rel(partial(&zero, 0), 10.0, 1e-15, 0.0, "AUC0–6 with zeros");
}

#[test]
fn unsorted_levels_give_the_same_result_as_sorted_ones() {
    let sorted = one("0,100,oral", &[(1.0, "2"), (2.0, "5"), (4.0, "3"), (8.0, "1"), (12.0, "0.5")], &[]);
    let shuffled = one("0,100,oral", &[(8.0, "1"), (1.0, "2"), (12.0, "0.5"), (4.0, "3"), (2.0, "5")], &[]);
    assert_eq!(sorted, shuffled);
}

#[test]
fn a_duplicated_time_is_refused_with_its_line() {
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", "time_h,amount_mg,route\n0,100,oral\n");
    let l = write(dir.path(), "l.csv", "time_h,conc_mg_l\n1,2\n2,3\n2,4\n");
    let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, "-o", "out.csv"]);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("l.csv: line 4"), "{}", ran.stderr);
    assert!(!dir.path().join("out.csv").exists());
}

#[test]
fn a_later_dose_without_a_pre_dose_level_has_no_areas_and_says_so() {
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", "time_h,amount_mg,route\n0,100,oral\n12,100,oral\n");
    let l = write(dir.path(), "l.csv", "time_h,conc_mg_l\n1,2\n2,5\n4,3\n13,6\n14,7\n16,5\n");
    let out = nca_json(dir.path(), &["--doses", &d, "--levels", &l]);
    let second = &out["subjects"][1];
    assert_eq!(second["interval"], 2);
    assert!(second["auc_last_mg_h_l"].is_null());
    assert!(second["notes"].to_string().contains("pre-dose"), "{second}");
    assert_rel(number(second, "cmax_mg_l"), 7.0, 0.0, 1.0, "Cmax of the second dose");
}

#[test]
fn bad_windows_and_a_sparse_design_with_several_doses_are_refused_naming_the_flag() {
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", "time_h,amount_mg,route\n0,100,oral\n12,100,oral\n");
    let l = write(dir.path(), "l.csv", "time_h,conc_mg_l\n1,2\n2,5\n4,3\n");
    for (flag, value) in [("--lambda-z-window", "24h..8h"), ("--partial", "abc"), ("--partial", "-1h..2h")] {
        let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, flag, value, "-o", "out.json"]);
        assert_eq!(ran.code, 2, "{flag} {value}: {}", ran.stderr);
        assert!(ran.stderr.contains(flag), "{}", ran.stderr);
        assert!(!dir.path().join("out.json").exists());
    }
    let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, "--sparse"]);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("--sparse") && ran.stderr.contains("2 doses"), "{}", ran.stderr);
}

#[test]
fn explain_shows_the_level_set_at_the_dose_time_and_the_lambda_z_choice() {
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", "time_h,amount_mg,route\n0,100,oral\n");
    let l = write(dir.path(), "l.csv", "time_h,conc_mg_l\n1,2\n2,5\n4,3\n8,1\n12,0.4\n16,<0.1\n");
    let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, "--explain", "--format", "csv"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stderr.contains("level at the dose time: 0"), "{}", ran.stderr);
    assert!(ran.stderr.contains("line 7") && ran.stderr.contains("left out"), "{}", ran.stderr);
    assert!(ran.stderr.contains("λz from 3 levels"), "{}", ran.stderr);
    assert!(ran.stderr.contains("caution:"));
}

#[test]
fn a_fit_beside_the_nca_is_flagged_where_they_disagree() {
    // Levels of a 100 mg bolus on the exact curve of CL = 5 L/h, V = 50 L: beside a fit with
    // those parameters the log-down NCA agrees to rounding; beside one with twice the clearance
    // both AUC and CL differ by far more than the 20 % margin.
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", "subject,time_h,amount_mg,route\nA,0,100,bolus\n");
    let mut levels = String::from("subject,time_h,conc_mg_l\n");
    for t in [1.0f64, 2.0, 4.0, 8.0, 12.0] {
        levels += &format!("A,{t},{}\n", 2.0 * (-0.1 * t).exp());
    }
    let l = write(dir.path(), "l.csv", &levels);
    let fit = |cl: f64| {
        format!(
            "{{\"subjects\": [{{\"subject\": \"A\", \"parameters\": {{\"cl_l_h\": {cl}, \"v_l\": 50.0, \
             \"ka_per_h\": null, \"f\": 1.0, \"tlag_h\": 0.0}}}}]}}"
        )
    };
    let same = write(dir.path(), "same.json", &fit(5.0));
    let out = nca_json(dir.path(), &["--doses", &d, "--levels", &l, "--fit", &same]);
    let c = &out["fit_comparison"][0];
    assert!(
        number(c, "auc_difference_pct").abs() < 1e-9 && number(c, "cl_difference_pct").abs() < 1e-9,
        "{c}"
    );
    assert_eq!(c["disagree"], false);
    let other = write(dir.path(), "other.json", &fit(10.0));
    let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, "--fit", &other, "--format", "table"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(
        ran.stdout.contains("DIFFERS") && ran.stderr.contains("differ by more than 20 %"),
        "{}",
        ran.stderr
    );
    // A fit file cannot be the output.
    let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, "--fit", &same, "-o", &same]);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
}

#[test]
fn the_svg_has_a_log_scale_panel_per_interval_with_the_terminal_line_and_the_caution() {
    let dir = tempfile::tempdir().unwrap();
    let data = reference_dir();
    let d = data.join("theoph_doses.csv");
    let l = data.join("theoph_levels.csv");
    let ran = nca(
        dir.path(),
        &["--doses", d.to_str().unwrap(), "--levels", l.to_str().unwrap(), "--svg", "p.svg", "-o", "t.csv"],
    );
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let svg = std::fs::read_to_string(dir.path().join("p.svg")).unwrap();
    assert!(svg.starts_with("<svg"));
    assert_eq!(svg.matches(", dose 1</text>").count(), 12);
    assert_eq!(svg.matches("terminal line, slope -").count(), 12);
    assert_eq!(svg.matches("levels of the terminal line").count(), 12);
    assert!(svg.contains("Not clinical advice"));
    let refused = nca(
        dir.path(),
        &["--doses", d.to_str().unwrap(), "--levels", l.to_str().unwrap(), "--sparse", "--svg", "q.svg"],
    );
    assert_eq!(refused.code, 2);
    assert!(!dir.path().join("q.svg").exists());
}

#[test]
fn listed_times_choose_the_levels_of_a_subjects_terminal_line() {
    // Subject A's line through the levels at 4, 6, 8 and 12 h (listed) equals the window 4h..12h;
    // subject B, not listed, keeps the automatic choice; a bad time is refused with its line.
    let dir = tempfile::tempdir().unwrap();
    let d = write(dir.path(), "d.csv", "subject,time_h,amount_mg,route\nA,0,100,oral\nB,0,100,oral\n");
    let rows = "1,2\n2,5\n4,3\n6,2.2\n8,1.5\n12,0.6\n";
    let mut levels = String::from("subject,time_h,conc_mg_l\n");
    for who in ["A", "B"] {
        levels += &rows.lines().map(|r| format!("{who},{r}\n")).collect::<String>();
    }
    let l = write(dir.path(), "l.csv", &levels);
    let times = write(dir.path(), "t.csv", "subject,time_h\nA,4\nA,6\nA,8\nA,12\n");
    let listed = nca_json(dir.path(), &["--doses", &d, "--levels", &l, "--lambda-z-times", &times]);
    let window = nca_json(dir.path(), &["--doses", &d, "--levels", &l, "--lambda-z-window", "4h..12h"]);
    let automatic = nca_json(dir.path(), &["--doses", &d, "--levels", &l]);
    assert_eq!(listed["subjects"][0]["lambda_z_points"], 4);
    assert_eq!(listed["subjects"][0]["lambda_z_per_h"], window["subjects"][0]["lambda_z_per_h"]);
    assert_eq!(listed["subjects"][1], automatic["subjects"][1]);
    let bad = write(dir.path(), "bad.csv", "subject,time_h\nA,4\nA,x\n");
    let ran = nca(dir.path(), &["--doses", &d, "--levels", &l, "--lambda-z-times", &bad]);
    assert_eq!(ran.code, 2);
    assert!(ran.stderr.contains("bad.csv: line 3"), "{}", ran.stderr);
}
