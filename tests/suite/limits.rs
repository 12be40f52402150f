//! Bounded work and finite results: each regression runs the real binary with the exact input
//! that once hung, aborted or printed NaN, under a 60-second guard (the child is killed and the
//! test fails), and every run asserts that no NaN or infinity reaches stdout or a written file.
//! A property test then throws random numeric flag values (valid, invalid and extreme) at
//! `simulate` and `exposure`.

use crate::common::demo_copy;
use proptest::prelude::*;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// The longest any run here may take: far beyond what a bounded run needs (well under a
/// second each), short enough that a hang fails the test instead of stalling the suite.
const GUARD: Duration = Duration::from_secs(60);

/// What one guarded run produced.
struct Run {
    code: i32,
    stdout: String,
    stderr: String,
}

/// Run `cistern ARGS` in `dir`, killing it (and failing) after [`GUARD`]; then assert that
/// neither stdout nor any file in `dir` holds a non-finite number, and that nothing panicked.
fn run(dir: &Path, args: &[&str]) -> Run {
    let out_path = dir.join(".stdout");
    let err_path = dir.join(".stderr");
    let mut child = Command::new(env!("CARGO_BIN_EXE_cistern"))
        .args(args)
        .current_dir(dir)
        .env("SOURCE_DATE_EPOCH", "0")
        .stdin(Stdio::null())
        .stdout(std::fs::File::create(&out_path).expect("stdout file"))
        .stderr(std::fs::File::create(&err_path).expect("stderr file"))
        .spawn()
        .expect("the cistern binary runs");
    let started = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().expect("wait for cistern") {
            break status;
        }
        if started.elapsed() > GUARD {
            let _ = child.kill();
            let _ = child.wait();
            panic!("cistern {} ran for more than {GUARD:?} and was killed", args.join(" "));
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    let stdout = std::fs::read_to_string(&out_path).expect("stdout is UTF-8");
    let stderr = std::fs::read_to_string(&err_path).expect("stderr is UTF-8");
    let _ = std::fs::remove_file(&out_path);
    let _ = std::fs::remove_file(&err_path);
    let code = status.code().unwrap_or_else(|| panic!("killed by a signal: {args:?}\n{stderr}"));
    assert!(!stderr.contains("panicked") && !stderr.contains("RUST_BACKTRACE"), "{args:?}: {stderr}");
    assert_finite(&stdout, &format!("stdout of {args:?}"));
    for entry in std::fs::read_dir(dir).expect("the run's directory") {
        let path = entry.expect("a directory entry").path();
        if path.is_file() {
            let bytes = std::fs::read(&path).expect("a written file");
            assert_finite(&String::from_utf8_lossy(&bytes), &format!("{} after {args:?}", path.display()));
        }
    }
    Run { code, stdout, stderr }
}

/// No word of `text` is NaN or an infinity, in any spelling a formatter uses.
fn assert_finite(text: &str, what: &str) {
    let bad = text
        .split(|c: char| !c.is_ascii_alphanumeric())
        .find(|w| matches!(w.to_ascii_lowercase().as_str(), "nan" | "inf" | "infinity"));
    assert!(bad.is_none(), "{what} holds '{}':\n{}", bad.unwrap_or_default(), &text[..text.len().min(2000)]);
}

/// No number in `text` is written with more than 20 digits in a row.
fn assert_readable_numbers(text: &str) {
    let longest = text.split(|c: char| !c.is_ascii_digit()).map(str::len).max().unwrap_or(0);
    assert!(longest <= 20, "a number of {longest} digits:\n{text}");
}

fn write(dir: &Path, name: &str, text: &str) {
    std::fs::write(dir.join(name), text).expect("write an input file");
}

const IV_MODEL_PROPORTIONAL: &str = "[clearance]\ntypical_l_h = 4.0\nbsv_cv = 0.3\n\
    [volume]\ntypical_l = 50.0\nbsv_cv = 0.25\n[residual]\nadditive_mg_l = 0.0\nproportional_cv = 0.15\n";

const ORAL_MODEL_PROPORTIONAL: &str = "[clearance]\ntypical_l_h = 4.0\nbsv_cv = 0.3\n\
    [volume]\ntypical_l = 50.0\nbsv_cv = 0.25\n[absorption]\ntypical_ka_per_h = 1.0\nbsv_cv = 0.5\nf = 0.8\n\
    tlag_h = 1.0\n[residual]\nadditive_mg_l = 0.0\nproportional_cv = 0.15\n";

/// The demo case with a proportional-only residual error and a level of 0 at the start of
/// P01's first infusion (t = 0, where the prediction is 0 whatever the parameters).
fn proportional_case() -> tempfile::TempDir {
    let dir = demo_copy();
    let model = std::fs::read_to_string(dir.path().join("model.toml")).expect("demo model");
    write(dir.path(), "model.toml", &model.replace("additive_mg_l = 0.5", "additive_mg_l = 0.0"));
    let levels = std::fs::read_to_string(dir.path().join("levels.csv")).expect("demo levels");
    write(dir.path(), "levels.csv", &levels.replace("P01,35.9,14.8", "P01,0,0\nP01,35.9,14.8"));
    let case = std::fs::read_to_string(dir.path().join("p01.toml")).expect("demo case");
    let without_sweep = case.split("[sweep]").next().expect("text before [sweep]").to_string();
    let report = case.split("[report]").nth(1).map(|r| format!("[report]{r}")).unwrap_or_default();
    write(dir.path(), "p01.toml", &format!("{without_sweep}{report}"));
    dir
}

#[test]
fn fit_plan_and_report_finish_with_a_proportional_only_error_and_a_zero_level_at_an_infusion_start() {
    let dir = proportional_case();
    let fit = run(dir.path(), &["fit", "--case", "p01.toml", "--format", "csv", "-o", "fit.csv"]);
    assert_eq!(fit.code, 0, "{}", fit.stderr);
    let rows = std::fs::read_to_string(dir.path().join("fit.csv")).expect("the fit's CSV");
    assert!(rows.lines().nth(1).is_some_and(|r| r.contains(",map,true,")), "{rows}");
    let plan = run(dir.path(), &["plan", "--case", "p01.toml", "--format", "json", "-o", "plan.json"]);
    assert_eq!(plan.code, 0, "{}", plan.stderr);
    let report = run(dir.path(), &["report", "p01.toml", "-o", "report.pdf"]);
    assert_eq!(report.code, 0, "{}", report.stderr);
}

#[test]
fn a_level_above_zero_before_any_drug_arrives_under_a_proportional_only_error_is_refused() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let d = dir.path();
    write(d, "iv.toml", IV_MODEL_PROPORTIONAL);
    write(d, "oral.toml", ORAL_MODEL_PROPORTIONAL);
    write(d, "iv_doses.csv", "time_h,amount_mg,route,duration_h\n0,1000,infusion,1\n");
    write(d, "oral_doses.csv", "time_h,amount_mg,route\n0,500,oral\n");
    // At the start of the infusion, and during the oral lag (1 h).
    write(d, "iv_levels.csv", "time_h,conc_mg_l\n0,2.5\n4,12\n");
    write(d, "oral_levels.csv", "time_h,conc_mg_l\n0.5,0.8\n4,6\n");
    for (model, doses, levels) in
        [("iv.toml", "iv_doses.csv", "iv_levels.csv"), ("oral.toml", "oral_doses.csv", "oral_levels.csv")]
    {
        let args = ["fit", "--model", model, "--doses", doses, "--levels", levels, "-o", "out.csv"];
        let r = run(d, &args);
        assert_eq!(r.code, 2, "{model}: {}", r.stderr);
        assert!(r.stderr.contains("line 2") && r.stderr.contains("additive"), "{model}: {}", r.stderr);
        assert!(!d.join("out.csv").exists());
    }
    // The same levels at 0 are the point mass the model predicts: the fit runs and converges.
    write(d, "oral_levels.csv", "time_h,conc_mg_l\n0.5,0\n2,5.5\n4,6\n8,4.1\n");
    let r =
        run(d, &["fit", "--model", "oral.toml", "--doses", "oral_doses.csv", "--levels", "oral_levels.csv"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.contains(",map,true,"), "{}", r.stdout);
}

#[test]
fn levels_of_1e160_are_refused_rather_than_fitted_for_minutes() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let d = dir.path();
    write(d, "model.toml", &IV_MODEL_PROPORTIONAL.replace("additive_mg_l = 0.0", "additive_mg_l = 0.5"));
    write(d, "doses.csv", "time_h,amount_mg,route,duration_h\n0,1000,infusion,1\n");
    write(d, "levels.csv", "time_h,conc_mg_l\n2,1e160\n6,3e160\n");
    let r = run(d, &["fit", "--model", "model.toml", "--doses", "doses.csv", "--levels", "levels.csv"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("levels.csv: line 2, column conc_mg_l"), "{}", r.stderr);
    assert_readable_numbers(&r.stderr);
}

#[test]
fn a_count_of_a_billion_or_a_hundred_million_is_refused_not_an_allocation_abort() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    for count in ["1000000000", "100000000"] {
        let args = [
            "simulate",
            "--dose",
            "1g",
            "--every",
            "12h",
            "--duration",
            "1h",
            "--cl",
            "4",
            "--v",
            "40",
            "--at",
            "1,2",
            "--count",
            count,
        ];
        let r = run(dir.path(), &args);
        assert_eq!(r.code, 2, "{}", r.stderr);
        assert!(r.stderr.contains("--count") && r.stderr.contains("1000000"), "{}", r.stderr);
    }
}

#[test]
fn a_thousand_rows_of_a_million_doses_each_are_refused_in_simulate_and_check() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let mut text = String::from("time_h,amount_mg,route,every_h,count\n");
    for i in 0..1000 {
        text.push_str(&format!("{i},100,bolus,1,1000000\n"));
    }
    write(dir.path(), "doses.csv", &text);
    for args in [
        &["simulate", "--doses", "doses.csv", "--cl", "4", "--v", "40", "--at", "1"][..],
        &["check", "doses.csv"][..],
    ] {
        let r = run(dir.path(), args);
        assert_eq!(r.code, 2, "{args:?}: {}", r.stderr);
        assert!(r.stderr.contains("doses.csv: line 3, column count"), "{args:?}: {}", r.stderr);
    }
}

#[test]
fn exposure_of_a_zero_dose_is_refused_not_a_nan_fluctuation() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    for format in ["csv", "json", "table"] {
        let args = [
            "exposure",
            "--dose",
            "0",
            "--every",
            "12h",
            "--duration",
            "1h",
            "--cl",
            "4",
            "--v",
            "40",
            "--format",
            format,
        ];
        let r = run(dir.path(), &args);
        assert_eq!(r.code, 2, "{}", r.stderr);
        assert!(r.stderr.contains("--dose") && r.stderr.contains("above 0"), "{}", r.stderr);
    }
}

#[test]
fn extreme_volumes_doses_and_durations_are_refused_in_readable_numbers() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let cases: [(&str, &[&str]); 2] = [
        ("--v 1e-300 --dose 1e10 --route bolus --every 12h --cl 4", &["--v", "--dose"]),
        ("--dose 1e300 --duration 1e-12h --every 12h --cl 4 --v 40", &["--dose", "--duration"]),
    ];
    for (flags, named) in cases {
        for command in ["exposure", "simulate --count 2 --at 1,2"] {
            let line = format!("{command} {flags}");
            let args: Vec<&str> = line.split_whitespace().collect();
            let r = run(dir.path(), &args);
            assert_eq!(r.code, 2, "{line}: {}", r.stderr);
            for flag in named {
                assert!(r.stderr.contains(&format!("error: {flag}:")), "{line}: {}", r.stderr);
            }
            assert_readable_numbers(&r.stderr);
        }
    }
}

#[test]
fn a_model_with_a_typical_clearance_of_1e308_is_refused_at_its_key() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let d = dir.path();
    let model = IV_MODEL_PROPORTIONAL.replace("typical_l_h = 4.0", "typical_l_h = 1e308");
    write(d, "model.toml", &model.replace("additive_mg_l = 0.0", "additive_mg_l = 0.5"));
    write(d, "doses.csv", "time_h,amount_mg,route,duration_h\n0,1000,infusion,1\n");
    write(d, "levels.csv", "time_h,conc_mg_l\n2,10\n6,5\n");
    let r = run(d, &["fit", "--model", "model.toml", "--doses", "doses.csv", "--levels", "levels.csv"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("model.toml: line 2") && r.stderr.contains("clearance.typical_l_h"),
        "{}",
        r.stderr
    );
    assert_readable_numbers(&r.stderr);
}

#[test]
fn covariates_of_1e300_kg_and_1e_320_ml_min_are_refused() {
    let dir = demo_copy();
    for covariate in ["weight_kg=1e300", "crcl_ml_min=1e-320"] {
        let args = [
            "fit",
            "--model",
            "model.toml",
            "--doses",
            "doses.csv",
            "--levels",
            "levels.csv",
            "--covariate",
            covariate,
        ];
        let r = run(dir.path(), &args);
        assert_eq!(r.code, 2, "{covariate}: {}", r.stderr);
        assert!(r.stderr.contains("--covariate") && r.stderr.contains("accepted range"), "{}", r.stderr);
        assert_readable_numbers(&r.stderr);
    }
    let table = std::fs::read_to_string(dir.path().join("covariates.csv")).expect("demo covariates");
    std::fs::write(dir.path().join("covariates.csv"), table.replace("P01,62,M,80,", "P01,62,M,1e300,"))
        .expect("write covariates");
    let r = run(dir.path(), &["fit", "--case", "p01.toml"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("covariates.csv: line 3, column weight_kg"), "{}", r.stderr);
}

#[test]
fn a_bare_infusion_duration_longer_than_its_interval_warns_and_names_the_unit() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let args = [
        "simulate",
        "--dose",
        "1000",
        "--duration",
        "60",
        "--every",
        "12",
        "--count",
        "3",
        "--cl",
        "4",
        "--v",
        "40",
        "--times",
        "0:36:1",
    ];
    let r = run(dir.path(), &args);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr.contains("warning:") && r.stderr.contains("longer than the dosing interval"),
        "{}",
        r.stderr
    );
    assert!(r.stderr.contains("read in h") && r.stderr.contains("60min"), "{}", r.stderr);
}

#[test]
fn a_clearance_of_0_004_warns_and_a_half_life_beyond_a_year_warns() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let common = ["exposure", "--dose", "1g", "--every", "12h", "--duration", "1h", "--v", "40"];
    let r = run(dir.path(), &[&common[..], &["--cl", "0.004"]].concat());
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stderr.contains("warning: --cl 0.004") && r.stderr.contains("L/h"), "{}", r.stderr);
    // 40 L / 0.002 L/h: a half-life of 13,863 h, beyond a year.
    let r = run(dir.path(), &[&common[..], &["--cl", "0.002"]].concat());
    assert!(r.stderr.contains("half-life") && r.stderr.contains("years"), "{}", r.stderr);
    // Written once, not once per use.
    assert_eq!(r.stderr.matches("half-life").count(), 1, "{}", r.stderr);
}

#[test]
fn a_grid_of_six_million_points_needs_allow_large_and_sixty_million_is_refused() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let common =
        ["simulate", "--dose", "1g", "--every", "12h", "--count", "3", "--duration", "1h", "--cl", "4"];
    let r = run(
        dir.path(),
        &[&common[..], &["--v", "40", "--times", "0:100000h:1min", "-o", "big.csv"]].concat(),
    );
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("--allow-large"), "{}", r.stderr);
    assert!(!dir.path().join("big.csv").exists());
    let huge = ["--v", "40", "--times", "0:1000000h:1min", "--allow-large", "-o", "big.csv"];
    let r = run(dir.path(), &[&common[..], &huge].concat());
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("50000000"), "{}", r.stderr);
    assert!(!dir.path().join("big.csv").exists());
}

#[test]
fn concentrations_below_the_floor_are_printed_as_zero_not_3_5e_323() {
    // 1 mg bolus into 1 L with k = 100/h: e^(-100·7.4) ≈ 1e-321 mg/L at 7.4 h, a subnormal.
    let dir = tempfile::tempdir().expect("a temporary directory");
    let args = [
        "simulate", "--dose", "1mg", "--route", "bolus", "--count", "1", "--cl", "100", "--v", "1", "--at",
        "0,7.4", "--format", "csv",
    ];
    let r = run(dir.path(), &args);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.stdout.lines().nth(2), Some("7.4,0.0"), "{}", r.stdout);
    assert_eq!(r.stdout.lines().nth(1), Some("0.0,1.0"), "{}", r.stdout);
}

#[test]
fn kept_draws_beyond_the_draws_limit_are_refused() {
    let dir = demo_copy();
    let r = run(dir.path(), &["fit", "--case", "p01.toml", "--keep-draws", "4000000000", "--format", "json"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("--keep-draws"), "{}", r.stderr);
}

/// A numeric flag value: ordinary, extreme, negative, zero, non-finite spellings and units.
fn value() -> impl Strategy<Value = String> {
    let mantissa = prop_oneof![Just(0.0), Just(1.0), 1e-3f64..1e3, -1e3f64..0.0];
    let exponent = prop_oneof![Just(0i32), -330i32..330];
    let unit =
        prop_oneof![Just(""), Just("h"), Just("min"), Just("mg"), Just("g"), Just("l"), Just("ml/min")];
    prop_oneof![
        8 => (mantissa, exponent, unit).prop_map(|(m, e, u)| format!("{m}e{e}{u}")),
        1 => prop_oneof![Just("nan".to_string()), Just("inf".to_string()), Just("-0".to_string())],
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn simulate_and_exposure_with_random_numbers_stay_bounded_and_finite(
        values in prop::collection::vec(value(), 7),
        route in prop_oneof![Just("bolus"), Just("infusion"), Just("oral")],
        count in prop_oneof![Just("1"), Just("3"), Just("2000000"), Just("0")],
    ) {
        let dir = tempfile::tempdir().expect("a temporary directory");
        let [dose, every, duration, cl, v, ka, at] = <[String; 7]>::try_from(values).expect("seven values");
        let mut common = vec![
            "--dose", &dose, "--every", &every, "--route", route, "--cl", &cl, "--v", &v, "--ka", &ka,
        ];
        if route == "infusion" {
            common.extend(["--duration", duration.as_str()]);
        }
        let mut simulate = vec!["simulate", "--count", count, "--at", &at, "--format", "csv"];
        simulate.extend(&common);
        let mut exposure = vec!["exposure", "--format", "json"];
        exposure.extend(&common);
        for args in [simulate, exposure] {
            let started = Instant::now();
            let r = run(dir.path(), &args);
            prop_assert!([0, 1, 2].contains(&r.code), "{args:?}: exit {}\n{}", r.code, r.stderr);
            prop_assert!(started.elapsed() < Duration::from_secs(10), "{args:?} took {:?}", started.elapsed());
        }
    }
}
