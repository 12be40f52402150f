//! Regressions of issue 10 on `cistern plan` and `cistern report`, each run as a real process
//! on the input that showed it (the invented demo scenario, `demo-regimens/`), and the a priori
//! plan checked against the closed forms of a log-normal clearance.

use crate::common::{Ran, cistern_at, demo_args, demo_copy, page_texts, save_demo_fit, squeeze};
use serde_json::Value;
use statrs::distribution::{ContinuousCDF, Normal};
use std::path::Path;

fn cistern(dir: &Path, args: &[&str]) -> Ran {
    cistern_at(dir, args, "1740837909")
}

fn json_of(dir: &Path, args: &[&str]) -> (Value, String) {
    let mut all = args.to_vec();
    all.extend(["--format", "json"]);
    let ran = cistern(dir, &all);
    assert_eq!(ran.code, 0, "cistern {all:?} failed:\n{}", ran.stderr);
    (serde_json::from_str(&ran.stdout).expect("JSON on stdout"), ran.stderr)
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// A grid of 1-h infusions for the demo study.
const GRID: [&str; 8] =
    ["--target", "auc24=400..600", "--amounts", "500..2000/250", "--every", "8h,12h", "--durations", "1h"];

fn demo_plan(dir: &Path, extra: &[&str]) -> (Value, String) {
    let args: Vec<&str> = demo_args("plan", &[&GRID[..], extra].concat());
    json_of(dir, &args)
}

/// P02's last dose is at 57 h and a level was drawn at 90 h: the new regimen started at 69 h
/// (one interval after the last dose), before that level, and the report plotted the level
/// under a curve of the new regimen. It now starts at the last level, and says why.
#[test]
fn the_default_start_is_not_before_the_last_level() {
    let dir = demo_copy();
    let (plan, stderr) = demo_plan(dir.path(), &["--subject", "P02", "--no-advice"]);
    assert!((num(&plan["start_h"]) - 90.0).abs() < 1e-12, "start {}", plan["start_h"]);
    assert!(stderr.contains("starts at 90 h") && stderr.contains("last level"), "{stderr}");
    // P01's last level (61 h) is before one interval after its last dose: unchanged.
    let (plan, _) = demo_plan(dir.path(), &["--subject", "P01", "--no-advice"]);
    assert!(num(&plan["start_h"]) > 61.0);
    let ran =
        cistern(dir.path(), &["report", "p01.toml", "--subject", "P02", "--draws", "200", "-o", "p02.pdf"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stderr.contains("starts at 90 h"), "{}", ran.stderr);
}

/// A start given before recorded data is kept, with a warning naming the later record.
#[test]
fn a_start_before_recorded_data_is_warned_about() {
    let dir = demo_copy();
    let (plan, stderr) = demo_plan(dir.path(), &["--subject", "P02", "--no-advice", "--start", "69h"]);
    assert!((num(&plan["start_h"]) - 69.0).abs() < 1e-12);
    assert!(
        stderr.contains(
            "warning: the new regimen starts at 69 h, before the last recorded event, the level at 90 h:"
        ),
        "{stderr}"
    );
    // Was a note that named only the level: a warning that counts the doses after the start.
    let (_, stderr) = demo_plan(dir.path(), &["--subject", "P02", "--no-advice", "--start", "10h"]);
    assert!(
        stderr.contains("warning: the new regimen starts at 10 h, before the last recorded event, the level at 90 h (4 recorded doses come after it)"),
        "{stderr}"
    );
    let (_, stderr) = demo_plan(dir.path(), &["--subject", "P02", "--no-advice", "--start", "100h"]);
    assert!(!stderr.contains("before the last recorded"), "{stderr}");
}

/// `plan --fit saved.json` and a plan that fits on the spot gave PTA 0.393 and 0.4165 for P02
/// with the same seed: the saved fit drew P02's posterior from the stream of the second
/// subject of the file, the planning fit from the first's. Both now draw from P02's own
/// stream, so the plans are the same to the bit.
#[test]
fn a_saved_fit_and_a_fit_on_the_spot_give_the_same_plan_for_a_later_subject() {
    let dir = demo_copy();
    let d = dir.path();
    save_demo_fit(d);
    let saved: Vec<&str> = ["plan", "--fit", "fit.json", "--doses", "doses.csv", "--subject", "P02"]
        .iter()
        .chain(&GRID)
        .copied()
        .collect();
    let (from_saved, _) = json_of(d, &saved);
    let (on_the_spot, _) = demo_plan(d, &["--subject", "P02"]);
    assert_eq!(from_saved, on_the_spot);
}

/// The advisor proposed a level 1 h after the start of a 1-h infusion, during distribution.
/// Every proposed time is now at least 1 h (or --sample-after) after the infusion ends, or a
/// trough (a minute before the next dose); the narrowing is under its new name.
#[test]
fn the_advice_leaves_out_the_distribution_phase() {
    let dir = demo_copy();
    for (flag, after) in [(None, 1.0), (Some("90min"), 1.5)] {
        let mut extra = vec!["--subject", "P01"];
        if let Some(f) = flag {
            extra.extend(["--sample-after", f]);
        }
        let (plan, _) = demo_plan(dir.path(), &extra);
        let rec = &plan["recommended"];
        let (every, duration) = (num(&rec["every_h"]), num(&rec["duration_h"]));
        let times = plan["next_level"]["times"].as_array().expect("advice");
        assert!(!times.is_empty());
        for t in times {
            let a = num(&t["after_dose_h"]);
            let trough = (a - (every - 1.0 / 60.0)).abs() < 1e-9;
            assert!(trough || a >= duration + after - 1e-9, "a level {a} h after a {duration}-h infusion");
            assert!(t.get("interval_narrowing_pct").is_some() && t.get("shrinkage_pct").is_none(), "{t}");
        }
    }
}

/// After an oral dose, when the advice is about the trough, no time before the expected
/// steady-state peak is proposed; the peak time is the one `cistern exposure` reports for the
/// same parameters and regimen.
#[test]
fn the_advice_on_an_oral_trough_waits_for_the_peak() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let p = serde_json::json!({"cl_l_h": 4.0, "v_l": 50.0, "ka_per_h": 0.8, "f": 0.9, "tlag_h": 0.0});
    let draws: Vec<Value> = (0..200)
        .map(|i| {
            let mut q = p.clone();
            q["cl_l_h"] = serde_json::json!(3.0 + 2.0 * f64::from(i) / 199.0);
            q
        })
        .collect();
    let fit = serde_json::json!({"subjects": [{"subject": null, "parameters": p, "residual": {"additive_mg_l": 0.5, "proportional_cv": 0.1}, "draws": draws}]});
    std::fs::write(d.join("fit.json"), fit.to_string()).unwrap();
    std::fs::write(d.join("doses.csv"), "time_h,amount_mg,route,duration_h\n0,500,oral,0\n").unwrap();
    let (plan, _) = json_of(
        d,
        &[
            "plan",
            "--fit",
            "fit.json",
            "--doses",
            "doses.csv",
            "--target",
            "trough=5..15",
            "--route",
            "oral",
            "--amounts",
            "500",
            "--every",
            "12h",
        ],
    );
    let (exposure, _) = json_of(
        d,
        &[
            "exposure", "--dose", "500", "--every", "12h", "--route", "oral", "--ka", "0.8", "--f", "0.9",
            "--cl", "4", "--v", "50",
        ],
    );
    let peak_time = num(&exposure["steady_state"]["peak_time_h"]);
    assert!(peak_time > 1.0);
    for t in plan["next_level"]["times"].as_array().expect("advice") {
        let a = num(&t["after_dose_h"]);
        assert!(
            a >= peak_time - 1e-9,
            "a trough level proposed {a} h after the dose, before the peak at {peak_time} h"
        );
    }
}

/// The covariates of the a priori checks: a 50-year-old man of 70 kg with serum creatinine
/// 0.9 mg/dL, whose Cockcroft–Gault clearance is 97.22 mL/min (reference case 9, Cockcroft DW,
/// Gault MH. Nephron 1976;16:31–41); the fixture model gives typical CL = 4·(97.22/100)^0.75.
const COVARIATES: [&str; 8] = [
    "--covariate",
    "age_y=50",
    "--covariate",
    "weight_kg=70",
    "--covariate",
    "scr_mg_dl=0.9",
    "--covariate",
    "sex=M",
];

fn fixture(name: &str) -> String {
    format!("{}/tests/fixtures/{name}", env!("CARGO_MANIFEST_DIR"))
}

/// A new patient: a model and covariates, no doses or levels. The plan is over draws from the
/// prior, so its median AUC24 is daily dose / typical CL (within the sampling error of a
/// median) and its PTA of a window is the log-normal closed form P(daily/hi ≤ CL ≤ daily/lo),
/// ln CL ~ N(ln CL_typ, ω²), ω² = ln(1 + 0.3²), within 4 binomial SE — as the sweep's test
/// checks its virtual population.
#[test]
fn a_priori_plan_for_a_new_patient_matches_the_prior() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let model = fixture("covariate_model.toml");
    let n = 20_000;
    let draws = n.to_string();
    let mut args = vec!["plan", "--model", &model, "--draws", &draws];
    args.extend(COVARIATES);
    args.extend([
        "--target",
        "auc24=400..600",
        "--amounts",
        "1000",
        "--every",
        "12h",
        "--durations",
        "1h",
        "--no-advice",
    ]);
    let (plan, stderr) = json_of(d, &args);
    assert_eq!(plan["a_priori"], Value::Bool(true));
    assert!(stderr.contains("a priori"), "the output says so: {stderr}");
    let c = &plan["candidates"][0];
    let cl_typ = 4.0 * (97.2222f64 / 100.0).powf(0.75);
    let omega = (1.0f64 + 0.09).ln().sqrt();
    let daily = 2000.0;
    // The sample median of ln AUC24 has SE ≈ √(π/2)·ω/√n; allow 4 SE.
    let median = num(&c["predicted"]["auc24_mg_h_l"]["median"]);
    let se_ln = (std::f64::consts::PI / 2.0).sqrt() * omega / (n as f64).sqrt();
    assert!(
        (median.ln() - (daily / cl_typ).ln()).abs() < 4.0 * se_ln,
        "median AUC24 {median} vs {}",
        daily / cl_typ
    );
    let ln_cl = Normal::new(cl_typ.ln(), omega).unwrap();
    let pta = ln_cl.cdf((daily / 400.0f64).ln()) - ln_cl.cdf((daily / 600.0f64).ln());
    let se = (pta * (1.0 - pta) / n as f64).sqrt();
    let got = num(&c["pta"]);
    assert!((got - pta).abs() <= 4.0 * se, "PTA {got} vs closed form {pta} (4 SE = {})", 4.0 * se);
    // An empty levels file (a header, no rows) is no levels: the same plan.
    std::fs::write(d.join("levels.csv"), "time_h,conc_mg_l\n").unwrap();
    let mut with_empty = args.clone();
    with_empty.extend(["--levels", "levels.csv"]);
    let (same, _) = json_of(d, &with_empty);
    assert_eq!(same, plan);
}

/// A case file without levels makes an a priori report, which says so.
#[test]
fn an_a_priori_report_says_so() {
    let dir = demo_copy();
    let d = dir.path();
    let case = std::fs::read_to_string(d.join("p01.toml")).unwrap();
    let case = case.replace("levels = \"levels.csv\"\n", "").replace("subjects = 2000", "subjects = 200");
    std::fs::write(d.join("new.toml"), case).unwrap();
    let ran = cistern(d, &["report", "new.toml", "--draws", "500", "-o", "new.pdf"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let pdf = std::fs::read(d.join("new.pdf")).unwrap();
    let text = squeeze(&page_texts(&pdf).join(" "));
    assert!(text.contains(&squeeze("the plan is a priori")), "the report says the plan is a priori");
    assert!(!text.contains("Estimates"), "no estimates without a fit");
}

/// Without --amounts, --every or --durations the grid was refused. It is now derived — the
/// usual intervals (6, 8, 12, 24 h, none shorter than --min-every), 1-h infusions and amounts in
/// a round step up to twice what the first target needs for the point estimate, never above
/// --max-dose — and stated on stderr. For every interval some amount brings the median AUC24
/// into the window: the grid is fine enough to meet the target.
#[test]
fn a_plan_without_candidates_derives_a_stated_grid() {
    let dir = demo_copy();
    let d = dir.path();
    let args = demo_args("plan", &["--target", "auc24=400..600", "--subject", "P01", "--no-advice"]);
    let (plan, stderr) = json_of(d, &args);
    assert!(stderr.contains("candidates: intervals 6h,8h,12h,24h"), "{stderr}");
    assert!(
        stderr.contains("candidates: infusions over 1 h") && stderr.contains("candidates: amounts"),
        "{stderr}"
    );
    let candidates = plan["candidates"].as_array().unwrap();
    let amounts: Vec<f64> = candidates.iter().map(|c| num(&c["amount_mg"])).collect();
    let step = amounts.iter().copied().fold(f64::INFINITY, f64::min);
    for c in candidates {
        assert!((num(&c["duration_h"]) - 1.0).abs() < 1e-12);
        let k = num(&c["amount_mg"]) / step;
        assert!(
            (k - k.round()).abs() < 1e-9,
            "{} mg is not a multiple of the step {step} mg",
            c["amount_mg"]
        );
    }
    for every in [6.0, 8.0, 12.0, 24.0] {
        let reached = candidates.iter().any(|c| {
            let auc = num(&c["predicted"]["auc24_mg_h_l"]["median"]);
            (num(&c["every_h"]) - every).abs() < 1e-12 && (400.0..=600.0).contains(&auc)
        });
        assert!(reached, "no amount every {every} h brings the median AUC24 into 400..600");
    }
    let limited: Vec<&str> = args.iter().copied().chain(["--max-dose", "1g", "--min-every", "8h"]).collect();
    let (plan, _) = json_of(d, &limited);
    for c in plan["candidates"].as_array().unwrap() {
        assert!(num(&c["amount_mg"]) <= 1000.0 && num(&c["every_h"]) >= 8.0, "{c}");
    }
    // Amounts cannot be derived from a time-above target alone: refused, naming the flag.
    let above: Vec<&str> = demo_args("plan", &["--target", "above=10mg/l..", "--subject", "P01"]);
    let ran = cistern(d, &above);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("--amounts"), "{}", ran.stderr);
}

/// `report` refused a case without candidate amounts, intervals or durations, which `plan`
/// derives. It now derives the same grid through the same function, states it on stderr and in
/// the report, and ranks the same candidates as `plan --case` on the same case.
#[test]
fn a_report_without_candidates_derives_the_grid_plan_derives() {
    let dir = demo_copy();
    let d = dir.path();
    let case = std::fs::read_to_string(d.join("p01.toml")).unwrap();
    let case: String = case
        .lines()
        .filter(|l| !["amounts =", "every =", "durations ="].iter().any(|k| l.starts_with(k)))
        .map(|l| format!("{}\n", l.replace("subjects = 2000", "subjects = 200")))
        .collect();
    std::fs::write(d.join("new.toml"), case).unwrap();
    let (plan, plan_stderr) = json_of(d, &["plan", "--case", "new.toml", "--draws", "300"]);
    let ran = cistern(d, &["report", "new.toml", "--draws", "300", "-o", "new.pdf"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let stated = |stderr: &str| -> Vec<String> {
        stderr.lines().filter(|l| l.starts_with("note: candidates: ")).map(str::to_string).collect()
    };
    let notes = stated(&ran.stderr);
    assert!(notes.iter().any(|n| n.contains("intervals 6h,8h,12h,24h")), "{}", ran.stderr);
    assert!(notes.iter().any(|n| n.contains("set plan.amounts in new.toml to choose")), "{}", ran.stderr);
    assert_eq!(notes, stated(&plan_stderr), "report and plan state the same derived grid");
    let text = squeeze(&page_texts(&std::fs::read(d.join("new.pdf")).unwrap()).join(" "));
    assert!(text.contains(&squeeze("Candidates: intervals 6h,8h,12h,24h")), "the report states the grid");
    let n = plan["candidates"].as_array().unwrap().len();
    assert!(text.contains(&squeeze(&format!("of {n} regimens"))), "the report ranks plan's {n} candidates");
}

/// A case file for a new patient named no doses: `report --case` and `plan --case` failed with
/// "missing field `doses`", and a doses file with a header and no rows was refused. Both now
/// plan a priori (the same plan), and neither the table nor the report speaks of a posterior.
/// With levels, an empty doses file is still an error naming it.
#[test]
fn a_case_without_doses_plans_a_priori() {
    let dir = demo_copy();
    let d = dir.path();
    let case = std::fs::read_to_string(d.join("p01.toml")).unwrap();
    let without = |case: &str| {
        case.replace("levels = \"levels.csv\"\n", "").replace("subjects = 2000", "subjects = 200")
    };
    std::fs::write(d.join("new.toml"), without(&case.replace("doses = \"doses.csv\"\n", ""))).unwrap();
    std::fs::write(d.join("none.csv"), "subject,time_h,amount_mg,route\n").unwrap();
    let header_only = case.replace("doses = \"doses.csv\"", "doses = \"none.csv\"");
    std::fs::write(d.join("empty.toml"), without(&header_only)).unwrap();
    let (plan, stderr) = json_of(d, &["plan", "--case", "new.toml", "--draws", "500", "--no-advice"]);
    assert_eq!(plan["a_priori"], Value::Bool(true), "{stderr}");
    let (same, _) = json_of(d, &["plan", "--case", "empty.toml", "--draws", "500", "--no-advice"]);
    assert_eq!(same, plan, "a header-only doses file is zero doses");
    let table = cistern(d, &["plan", "--case", "new.toml", "--draws", "500", "--format", "table"]);
    assert_eq!(table.code, 0, "{}", table.stderr);
    assert!(table.stdout.contains("Medians over the draws from the population prior"), "{}", table.stdout);
    assert!(!table.stdout.contains("posterior draws"), "{}", table.stdout);
    let ran = cistern(d, &["report", "--case", "new.toml", "--draws", "500", "-o", "new.pdf"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let text = squeeze(&page_texts(&std::fs::read(d.join("new.pdf")).unwrap()).join(" "));
    assert!(text.contains(&squeeze("medians over the draws from the population prior")));
    for wrong in ["medians over the posterior", "maximum a posteriori", "every posterior draw"] {
        assert!(!text.contains(&squeeze(wrong)), "an a priori report says '{wrong}'");
    }
    std::fs::write(d.join("levels-no-doses.toml"), header_only).unwrap();
    let refused = cistern(d, &["plan", "--case", "levels-no-doses.toml", "--draws", "500"]);
    assert_eq!(refused.code, 2, "{}", refused.stderr);
    assert!(refused.stderr.contains("none.csv"), "{}", refused.stderr);
    assert!(!d.join("new.csv").exists());
}

/// The report's tables printed each number on its own: dose times `0`, `8.0000`, `20.500` in
/// one column, next-level times `132.20` beside `96.200`. Each column now has one number of
/// decimals (enough for the significant digits of its largest value, no more than its values
/// need): the demo's dose times print as 0.00, 12.50, 23.75, 36.20, the advice's as 132.2, 96.2.
#[test]
fn report_columns_print_one_number_of_decimals_each() {
    let dir = demo_copy();
    let d = dir.path();
    let ran = cistern(d, &["report", "--case", "p01.toml", "-o", "p.pdf"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let text = page_texts(&std::fs::read(d.join("p.pdf")).unwrap()).join("\n");
    let tokens: Vec<&str> = text.split_whitespace().collect();
    for cell in ["0.00", "12.50", "23.75", "36.20", "48.20", "60.20", "132.2", "96.2"] {
        assert!(tokens.contains(&cell), "no cell '{cell}' in the report");
    }
    for odd in ["96.200", "132.20", "12.500", "36.200"] {
        assert!(!tokens.contains(&odd), "a cell '{odd}' of another format in its column");
    }
}
