//! The visual predictive check (`cistern vpc`): the simulated percentiles against their exact
//! distribution and the observed ones against numpy (tests/reference/vpc/), calibration under
//! the true model, prediction correction by an exact identity, determinism whatever the thread
//! count, the SVG against the CSV, and bad input.

use crate::common::{Ran, ran};
use cistern::diagnostics::vpc::{BinBy, Bins, Vpc, VpcOptions, vpc};
use cistern::engine::{Params, concentrations};
use cistern::io::levels::Level;
use cistern::{Covariates, Dose, PopulationModel, Route, SubjectData};
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use serde_json::Value;
use statrs::distribution::Normal;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn reference() -> Value {
    serde_json::from_str(&std::fs::read_to_string(root().join("tests/reference/vpc/values.json")).unwrap())
        .unwrap()
}

fn model(text: &str, dir: &Path) -> PopulationModel {
    let path = dir.join("model.toml");
    std::fs::write(&path, text).unwrap();
    PopulationModel::read(path.to_str().unwrap()).unwrap()
}

fn options(replicates: usize, seed: u64) -> VpcOptions {
    VpcOptions {
        replicates,
        seed,
        bin_by: BinBy::TimeAfterDose,
        bins: Bins::Auto,
        prediction_corrected: false,
    }
}

fn level(time_h: f64, conc: Option<f64>, lloq: Option<f64>) -> Level {
    Level { time_h, conc_mg_l: conc, lloq_mg_l: lloq, line: 0 }
}

fn bolus(amount_mg: f64) -> Vec<Dose> {
    vec![Dose { time_h: 0.0, amount_mg, route: Route::Bolus, duration_h: 0.0 }]
}

/// The study of tests/reference/vpc/values.json: a bolus of 100 mg, levels at 6 h and 24 h.
fn reference_study(r: &Value) -> Vec<SubjectData> {
    let design = &r["design"];
    let times: Vec<f64> = design["times_h"].as_array().unwrap().iter().map(|t| t.as_f64().unwrap()).collect();
    let lloq = design["lloq_mg_l"].as_f64();
    r["study"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| SubjectData {
            id: Some(s["subject"].as_str().unwrap().into()),
            doses: bolus(design["dose_mg"].as_f64().unwrap()),
            levels: times
                .iter()
                .zip(s["conc_mg_l"].as_array().unwrap())
                .map(|(&t, c)| level(t, c.as_f64(), lloq))
                .collect(),
            covariates: Covariates::default(),
        })
        .collect()
}

#[track_caller]
fn same(actual: Option<f64>, expected: &Value, tol: f64, what: &str) {
    match (actual, expected.as_f64()) {
        (None, None) => {}
        (Some(a), Some(e)) => assert!((a - e).abs() <= tol, "{what}: {a} against {e} ± {tol}"),
        (a, _) => panic!("{what}: {a:?} against {expected}"),
    }
}

/// The observed percentiles are numpy's nearest-rank ("inverted_cdf") percentiles with
/// censored levels ranked lowest; the interval over 2,000 replicates and its median are the
/// exact quantiles of the order statistic (scipy, by quadrature) within four Monte-Carlo
/// standard errors; the fraction below the limit is within one level (1/100) of the exact
/// binomial quantile, the step of its distribution.
#[test]
fn percentiles_match_numpy_and_the_exact_predictive_distribution() {
    let r = reference();
    let study = reference_study(&r);
    let m = PopulationModel::read(root().join("tests/reference/vpc/model.toml").to_str().unwrap()).unwrap();
    let replicates = r["design"]["replicates"].as_u64().unwrap() as usize;
    let result = vpc(&study, &m, &options(replicates, 11)).unwrap();
    assert_eq!(result.bins.len(), 2, "one bin per sampling time");
    for (bin, expected) in result.bins.iter().zip(r["times"].as_array().unwrap()) {
        let t = expected["time_h"].as_f64().unwrap();
        assert!(bin.from_h <= t && t <= bin.to_h);
        let (observed, simulated) = (&expected["observed"], &expected["simulated"]);
        for (percent, c) in bin.percentiles() {
            let key = format!("p{percent:02}");
            same(c.observed, &observed[&key], 1e-15, &format!("{t} h observed {key}"));
            for (value, name) in
                [(c.simulated_lo, "lo"), (c.simulated_median, "median"), (c.simulated_hi, "hi")]
            {
                let e = &simulated[&key];
                let se = e[format!("{name}_mc_se")].as_f64().unwrap();
                same(value, &e[name], 4.0 * se, &format!("{t} h simulated {key} {name}"));
            }
        }
        same(
            bin.blq_fraction.observed,
            &observed["blq_fraction"],
            1e-15,
            "observed fraction below the limit",
        );
        let f = &simulated["blq_fraction"];
        same(bin.blq_fraction.simulated_lo, &f["lo"], 0.01 + 1e-12, "fraction below, lo");
        same(bin.blq_fraction.simulated_median, &f["median"], 0.01 + 1e-12, "fraction below, median");
        same(bin.blq_fraction.simulated_hi, &f["hi"], 0.01 + 1e-12, "fraction below, hi");
    }
}

/// An invented oral drug: CL 4 L/h (CV 30 %), V 40 L (CV 20 %), ka 1.2/h (CV 40 %), residual
/// 0.02 mg/L + 10 %.
const TRUE_MODEL: &str = "[clearance]\ntypical_l_h = 4.0\nbsv_cv = 0.3\n[volume]\ntypical_l = 40.0\nbsv_cv = 0.2\n\
    [absorption]\ntypical_ka_per_h = 1.2\nbsv_cv = 0.4\n[residual]\nadditive_mg_l = 0.02\nproportional_cv = 0.1\n";

/// A study drawn from [`TRUE_MODEL`] by the test's own code (not the check's simulator): 60
/// subjects, 100 mg by mouth at 0 h, levels near 0.5, 1, 2, 4, 6, 8, 12 and 24 h (±5 %),
/// LLOQ 0.1 mg/L.
fn drawn_study(seed: u64) -> Vec<SubjectData> {
    let mut rng = StdRng::seed_from_u64(seed);
    let normal = Normal::standard();
    let w = |cv: f64| (1.0f64 + cv * cv).ln().sqrt();
    let doses = vec![Dose { time_h: 0.0, amount_mg: 100.0, route: Route::Oral, duration_h: 0.0 }];
    (0..60)
        .map(|i| {
            let mut z = || normal.sample(&mut rng);
            let p = Params {
                cl_l_h: 4.0 * (w(0.3) * z()).exp(),
                v_l: 40.0 * (w(0.2) * z()).exp(),
                ka_per_h: Some(1.2 * (w(0.4) * z()).exp()),
                f: 1.0,
                tlag_h: 0.0,
            };
            let times: Vec<f64> = [0.5, 1.0, 2.0, 4.0, 6.0, 8.0, 12.0, 24.0]
                .iter()
                .map(|t| t * (1.0 + 0.05 * z().tanh()))
                .collect();
            let mut times = times;
            times.sort_by(f64::total_cmp);
            let levels = concentrations(&p, &doses, &times)
                .iter()
                .zip(&times)
                .map(|(&c, &t)| {
                    let y = c + (0.02f64.powi(2) + (0.1 * c).powi(2)).sqrt() * normal.sample(&mut rng);
                    level(t, (y >= 0.1).then_some(y), Some(0.1))
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

/// The share of observed percentiles inside their 90 % interval over ten drawn studies.
fn coverage(m: &PopulationModel) -> f64 {
    let (mut inside, mut compared) = (0, 0);
    for seed in 0..10 {
        let result: Vpc = vpc(&drawn_study(1000 + seed), m, &options(200, seed)).unwrap();
        assert_eq!(result.bins.len(), 8, "one bin per nominal time");
        inside += result.coverage.inside;
        compared += result.coverage.compared;
    }
    assert!(compared >= 200, "{compared} percentiles compared");
    inside as f64 / compared as f64
}

/// Under the true model an observed percentile is one more draw of the statistic the
/// replicates draw, so it falls in their 90 % interval with probability about 0.90 (exactly
/// 181/201 for 200 replicates). Over ten studies × 8 bins × 3 percentiles (fewer where the 5th
/// percentile is below the limit) the share would have an SD of about 0.02 if the pairs were
/// independent; the percentiles of one study share its subjects, so the band allows for a
/// design effect of 2: 0.90 ± 3·0.027, [0.82, 0.98]. A model with too little variability
/// (every CV 5 %) must fall far below it.
#[test]
fn under_the_true_model_about_ninety_percent_of_the_percentiles_lie_in_their_intervals() {
    let dir = tempfile::tempdir().unwrap();
    let share = coverage(&model(TRUE_MODEL, dir.path()));
    eprintln!("true model: {share} inside");
    assert!((0.82..=0.98).contains(&share), "share inside {share}");
    let narrow = TRUE_MODEL.replace("bsv_cv = 0.3", "bsv_cv = 0.05").replace("bsv_cv = 0.2", "bsv_cv = 0.05");
    let share = coverage(&model(&narrow, dir.path()));
    eprintln!("CV 5 %: {share} inside");
    assert!(share < 0.7, "a misspecified model: share inside {share}");
}

/// Prediction correction by the identity it is defined by: two subjects given 100 and 300 mg
/// by bolus, one level each at 6 h; PRED_i = D_i/V·exp(−CL/V·6), the bin's median PRED their
/// mean, and each corrected level y_i·PRED_bin/PRED_i. The nearest-rank median of two values
/// is the smaller, the 95th percentile the larger.
#[test]
fn prediction_correction_scales_each_level_by_the_bins_median_prediction_over_its_own() {
    let dir = tempfile::tempdir().unwrap();
    let m = model(
        "[clearance]\ntypical_l_h = 4.0\nbsv_cv = 0.3\n[volume]\ntypical_l = 40.0\nbsv_cv = 0.2\n\
         [residual]\nadditive_mg_l = 0.0\nproportional_cv = 0.15\n",
        dir.path(),
    );
    let (d, y) = ([100.0, 300.0], [1.7, 3.1]);
    let study: Vec<SubjectData> = (0..2)
        .map(|i| SubjectData {
            id: Some(format!("S{i}")),
            doses: bolus(d[i]),
            levels: vec![level(6.0, Some(y[i]), None)],
            covariates: Covariates::default(),
        })
        .collect();
    let pred = d.map(|d| d / 40.0 * (-0.1f64 * 6.0).exp());
    let bin = (pred[0] + pred[1]) / 2.0;
    let corrected = [y[0] * bin / pred[0], y[1] * bin / pred[1]];
    let pc = vpc(&study, &m, &VpcOptions { prediction_corrected: true, ..options(50, 1) }).unwrap();
    let b = &pc.bins[0];
    let close = |a: Option<f64>, e: f64| (a.unwrap() - e).abs() <= 1e-12 * e;
    assert!(close(b.p50_mg_l.observed, corrected[0].min(corrected[1])), "{:?} {corrected:?}", b.p50_mg_l);
    assert!(close(b.p95_mg_l.observed, corrected[0].max(corrected[1])), "{:?} {corrected:?}", b.p95_mg_l);
    let plain = vpc(&study, &m, &options(50, 1)).unwrap();
    assert!(close(plain.bins[0].p50_mg_l.observed, 1.7));
}

fn theoph(dir: &Path, extra: &[&str], threads: &str) -> Ran {
    let t = root().join("tests/reference/population/theoph");
    let file = |f: &str| t.join(f).to_str().unwrap().to_string();
    let mut args = vec![
        "vpc".to_string(),
        "--model".into(),
        file("nlme_model.toml"),
        "--doses".into(),
        file("doses.csv"),
        "--levels".into(),
        file("levels.csv"),
        "--covariates".into(),
        file("covariates.csv"),
    ];
    args.extend(extra.iter().map(|s| s.to_string()));
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(&args).current_dir(dir).env("RAYON_NUM_THREADS", threads);
    ran(command)
}

/// The same seed gives the same bytes with one thread or two (R's Theoph data, with the nlme
/// estimates of tests/reference/population/); another seed gives other intervals.
#[test]
fn the_check_is_the_same_whatever_the_thread_count() {
    let dir = tempfile::tempdir().unwrap();
    let one = theoph(dir.path(), &["--format", "csv", "--replicates", "300", "--prediction-corrected"], "1");
    let two = theoph(dir.path(), &["--format", "csv", "--replicates", "300", "--prediction-corrected"], "2");
    assert_eq!(one.code, 0, "{}", one.stderr);
    assert_eq!(one.stdout, two.stdout);
    let other = theoph(
        dir.path(),
        &["--format", "csv", "--replicates", "300", "--prediction-corrected", "--seed", "2"],
        "2",
    );
    assert_ne!(one.stdout, other.stdout);
}

/// The CSV's rows as maps from column to cell.
fn csv_rows(text: &str) -> Vec<std::collections::HashMap<String, String>> {
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    lines
        .map(|l| header.iter().map(|h| h.to_string()).zip(l.split(',').map(String::from)).collect())
        .collect()
}

/// The (x, y) points of every `<path>` of `svg` whose tag holds `marker`, in order.
fn paths(svg: &str, marker: &str) -> Vec<Vec<(f64, f64)>> {
    svg.split("<path")
        .skip(1)
        .filter(|t| t.split('>').next().unwrap().contains(marker))
        .map(|t| {
            let d = t.split("d=\"").nth(1).unwrap().split('"').next().unwrap();
            d.split(['M', 'L', 'Z'])
                .filter(|p| !p.is_empty())
                .map(|p| {
                    let mut xy = p.split(' ').map(|v| v.parse::<f64>().unwrap());
                    (xy.next().unwrap(), xy.next().unwrap())
                })
                .collect()
        })
        .collect()
}

/// The plot draws the CSV's numbers: the observed percentile lines pass through (mid_h, obs)
/// of every bin and the bands' corners through (mid_h, sim_lo) and (mid_h, sim_hi), under one
/// linear map from data to points (fitted on two bins of the observed median, checked on all
/// the rest to 0.02 pt, the SVG's rounding). And the SVG is not blank: three bands, three
/// lines, the levels and the caution.
#[test]
fn the_svg_draws_the_numbers_of_the_csv() {
    let dir = tempfile::tempdir().unwrap();
    let ran = theoph(dir.path(), &["-o", "vpc.csv", "--svg", "vpc.svg", "--replicates", "200"], "2");
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let rows = csv_rows(&std::fs::read_to_string(dir.path().join("vpc.csv")).unwrap());
    let svg = std::fs::read_to_string(dir.path().join("vpc.svg")).unwrap();
    assert!(svg.starts_with("<svg") && svg.contains("Not clinical advice"));
    assert_eq!(svg.matches("<circle").count(), 132 + 1, "every level and the legend's dot");
    let value = |row: &std::collections::HashMap<String, String>, k: &str| row[k].parse::<f64>().unwrap();
    let lines = paths(&svg, "class=\"series\"");
    assert_eq!(lines.len(), 3, "the observed 5th, 50th and 95th percentiles");
    let bands: Vec<Vec<(f64, f64)>> =
        paths(&svg, "fill=\"#").into_iter().filter(|p| p.len() == 2 * rows.len()).collect();
    assert_eq!(bands.len(), 3, "a band per percentile over every bin");
    // The map, from bins 2 and 10 of the median line.
    let (a, b) = (&rows[1], &rows[9]);
    let (pa, pb) = (lines[1][1], lines[1][9]);
    let sx = (pb.0 - pa.0) / (value(b, "mid_h") - value(a, "mid_h"));
    let sy = (pb.1 - pa.1) / (value(b, "p50_obs_mg_l") - value(a, "p50_obs_mg_l"));
    let at =
        |x: f64, y: f64| (pa.0 + sx * (x - value(a, "mid_h")), pa.1 + sy * (y - value(a, "p50_obs_mg_l")));
    let near = |p: (f64, f64), q: (f64, f64), what: &str| {
        assert!(
            (p.0 - q.0).abs() < 0.02 && (p.1 - q.1).abs() < 0.02,
            "{what}: drawn at {p:?}, the CSV maps to {q:?}"
        )
    };
    for (k, key) in ["p05", "p50", "p95"].iter().enumerate() {
        let n = rows.len();
        for (i, row) in rows.iter().enumerate() {
            let x = value(row, "mid_h");
            near(
                lines[k][i],
                at(x, value(row, &format!("{key}_obs_mg_l"))),
                &format!("bin {} observed {key}", i + 1),
            );
            // A band runs along its upper edge, then back along its lower one.
            near(
                bands[k][i],
                at(x, value(row, &format!("{key}_sim_hi_mg_l"))),
                &format!("bin {} {key} hi", i + 1),
            );
            near(
                bands[k][2 * n - 1 - i],
                at(x, value(row, &format!("{key}_sim_lo_mg_l"))),
                &format!("bin {} {key} lo", i + 1),
            );
        }
    }
}

/// Bad input: exit 2, a message naming the flag or file, nothing written.
#[test]
fn bad_input_is_refused_naming_the_flag_and_nothing_is_written() {
    let dir = tempfile::tempdir().unwrap();
    let out = ["-o", "vpc.csv", "--svg", "vpc.svg"];
    let cases: [(&[&str], &str); 6] = [
        (&["--replicates", "0"], "--replicates"),
        (&["--replicates", "100001"], "--replicates"),
        (&["--bins", "0,4h,2h,24h"], "--bins: the bin edges must increase: 4 is followed by 2"),
        (&["--bins", "6h"], "--bins: expected at least two bin edges"),
        (&["--bins", "0,soon"], "--bins"),
        (&["--bin-by", "clock"], "--bin-by"),
    ];
    for (extra, expected) in cases {
        let ran = theoph(dir.path(), &[extra, &out[..]].concat(), "2");
        assert_eq!(ran.code, 2, "{extra:?}: {}", ran.stderr);
        assert!(ran.stderr.contains(expected), "{extra:?}: {}", ran.stderr);
        assert!(!ran.stderr.contains("panicked"));
    }
    // A model file that does not exist, and no model at all.
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    let t = root().join("tests/reference/population/theoph");
    let (doses, levels) = (t.join("doses.csv"), t.join("levels.csv"));
    let base = ["vpc", "--doses", doses.to_str().unwrap(), "--levels", levels.to_str().unwrap()];
    command.args(base).args(["--model", "no-such-model.toml"]).args(out).current_dir(dir.path());
    let missing = ran(command);
    assert_eq!(missing.code, 2);
    assert!(missing.stderr.contains("no-such-model.toml"), "{}", missing.stderr);
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(base).args(out).current_dir(dir.path());
    let none = ran(command);
    assert_eq!(none.code, 2);
    assert!(none.stderr.contains("--model"), "{}", none.stderr);
    assert!(crate::common::entries(dir.path()).is_empty(), "{:?}", crate::common::entries(dir.path()));
}

/// Given edges bin by them: levels outside are left out with a note, and the JSON states it.
#[test]
fn given_edges_bin_the_levels_and_leave_out_those_outside() {
    let dir = tempfile::tempdir().unwrap();
    let ran =
        theoph(dir.path(), &["--bins", "0.5h,2h,6h,12h", "--format", "json", "--replicates", "50"], "2");
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let json: Value = serde_json::from_str(&ran.stdout).unwrap();
    let bins = json["bins"].as_array().unwrap();
    assert_eq!(bins.len(), 3);
    assert_eq!(bins[0]["from_h"], 0.5);
    assert_eq!(bins[2]["to_h"], 12.0);
    let counts: Vec<u64> = bins.iter().map(|b| b["levels"].as_u64().unwrap()).collect();
    assert_eq!(counts.iter().sum::<u64>(), json["levels"].as_u64().unwrap());
    assert_eq!(json["levels"].as_u64().unwrap() + json["left_out"].as_u64().unwrap(), 132);
    assert!(ran.stderr.contains("outside the bin edges are left out"), "{}", ran.stderr);
    assert!(json["caution"].as_str().unwrap().contains("Not clinical advice"));
    for b in bins {
        let c = &b["p50_mg_l"];
        let (lo, mid, hi) =
            (c["simulated_lo"].as_f64(), c["simulated_median"].as_f64(), c["simulated_hi"].as_f64());
        assert!(lo <= mid && mid <= hi, "{c}");
    }
}
