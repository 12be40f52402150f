//! The command line, run as a real process (`CARGO_BIN_EXE_cistern`) in temporary directories.
//!
//! What is checked here is the contract of the commands: the shape of each output, that CSV
//! carries the library's numbers to the last bit, that the caution travels with every format,
//! that `-o` writes atomically and never over an input, that unit suffixes convert, and that
//! `--help` teaches by example. The engine's numbers themselves are verified against an
//! independent ODE solver and published cases elsewhere; a few exact identities and published
//! values are repeated here so a wrong wiring (say, `--k` read as clearance) cannot pass.

use crate::common::{assert_published, assert_rel, entries};
use cistern::dosing::{Dose, Regimen, Route, Schedule};
use cistern::engine::steady::SteadyCurve;
use cistern::engine::{self, Params};
use cistern::io::output::CAUTION;
use cistern::units::{Kind, parse_value};
use serde_json::Value;
use std::path::Path;
use std::process::Command;

/// What one run of the binary produced.
struct Ran {
    code: i32,
    stdout: String,
    stderr: String,
}

/// Run `cistern ARGS` with `dir` as the working directory.
fn cistern(dir: &Path, args: &[&str]) -> Ran {
    let out = Command::new(env!("CARGO_BIN_EXE_cistern"))
        .args(args)
        .current_dir(dir)
        .output()
        .expect("the cistern binary runs");
    Ran {
        code: out.status.code().expect("exited, not killed by a signal"),
        stdout: String::from_utf8(out.stdout).expect("stdout is UTF-8"),
        stderr: String::from_utf8(out.stderr).expect("stderr is UTF-8"),
    }
}

/// Run and insist on success.
fn ok(dir: &Path, args: &[&str]) -> Ran {
    let ran = cistern(dir, args);
    assert_eq!(ran.code, 0, "cistern {args:?} failed:\n{}", ran.stderr);
    ran
}

fn tempdir() -> tempfile::TempDir {
    tempfile::tempdir().expect("a temporary directory")
}

/// The records of a CSV text, with its header, read by an ordinary CSV reader.
fn csv_records(text: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let mut reader = csv::Reader::from_reader(text.as_bytes());
    let header = reader.headers().expect("a CSV header").iter().map(str::to_string).collect();
    let rows = reader
        .records()
        .map(|r| r.expect("a well-formed CSV record").iter().map(str::to_string).collect())
        .collect();
    (header, rows)
}

fn number(text: &str) -> f64 {
    text.parse().unwrap_or_else(|_| panic!("'{text}' is not a number"))
}

/// The exact AUC the CSV run reports on stderr (`note: ...AUC from A h to B h = X mg·h/L`).
fn auc_notes(stderr: &str) -> Vec<f64> {
    stderr
        .lines()
        .filter(|l| l.contains("AUC from"))
        .map(|l| number(l.split("= ").nth(1).and_then(|r| r.strip_suffix(" mg·h/L")).expect(l)))
        .collect()
}

/// Bit-for-bit equality: CSV promises the shortest text that reads back as the same f64, so
/// any tolerance here would hide a lossy format.
#[track_caller]
fn assert_same_f64(actual: f64, expected: f64, what: &str) {
    assert_eq!(actual.to_bits(), expected.to_bits(), "{what}: {actual:?} is not {expected:?}");
}

/// The regimen of the worked examples below: 1 g over 1 h every 12 h, 6 doses.
const REGIMEN: [&str; 10] =
    ["--dose", "1g", "--route", "infusion", "--duration", "1h", "--every", "12h", "--count", "6"];

fn regimen_doses() -> Vec<Dose> {
    Schedule {
        regimen: Regimen { amount_mg: 1000.0, every_h: 12.0, duration_h: 1.0, route: Route::Infusion },
        count: 6,
        start_h: 0.0,
    }
    .doses()
}

#[test]
fn simulate_csv_is_the_library_curve_to_the_last_bit() {
    let dir = tempdir();
    let mut args = vec!["simulate"];
    args.extend(REGIMEN);
    args.extend(["--cl", "4.2", "--v", "48", "--times", "0:72h:30min", "--format", "csv"]);
    let ran = ok(dir.path(), &args);

    let (header, rows) = csv_records(&ran.stdout);
    assert_eq!(header, ["time_h", "conc_mg_l"]);
    // 0, 0.5, …, 72: END lies on the grid, so it is included.
    assert_eq!(rows.len(), 145);
    let step = parse_value(Kind::Time, "30min").unwrap();
    let times: Vec<f64> = (0..rows.len()).map(|i| i as f64 * step).collect();
    let params = Params::iv(4.2, 48.0);
    let doses = regimen_doses();
    let expected = engine::concentrations(&params, &doses, &times);
    for (i, row) in rows.iter().enumerate() {
        assert_same_f64(number(&row[0]), times[i], "time");
        assert_same_f64(number(&row[1]), expected[i], &format!("concentration at {} h", times[i]));
    }
    assert_same_f64(auc_notes(&ran.stderr)[0], engine::auc(&params, &doses, 0.0, times[144]), "AUC note");
    // The data stay pure: the caution goes to stderr only.
    assert!(!ran.stdout.contains(CAUTION) && ran.stderr.contains(CAUTION), "{}", ran.stderr);
}

#[test]
fn the_grid_includes_end_within_rounding_and_never_passes_it() {
    let dir = tempdir();
    // (grid, number of points, last time). 0.3/0.1 is 2.9999999999999996 in binary, yet 0.3
    // is on the grid; 1/0.3 is not a whole number, so the grid stops at 0.9.
    let cases = [
        ("0:0.3:0.1", 4, 0.3),
        ("0:1:0.3", 4, 0.9),
        ("2h:2h:1h", 1, 2.0),
        ("0:1d:6h", 5, 24.0),
        ("-1:1:0.5", 5, 1.0),
        ("0:90min:30min", 4, 1.5),
    ];
    for (grid, points, last) in cases {
        let ran = ok(
            dir.path(),
            &["simulate", "--dose", "100", "--route", "bolus", "--count", "1", "--cl", "1", "--v", "10"]
                .into_iter()
                .chain(["--times", grid, "--format", "csv"])
                .collect::<Vec<_>>(),
        );
        let (_, rows) = csv_records(&ran.stdout);
        assert_eq!(rows.len(), points, "--times {grid}");
        assert_rel(number(&rows[points - 1][0]), last, 1e-12, 1.0, &format!("last time of {grid}"));
    }
}

#[test]
fn at_times_keep_their_order_and_units() {
    let dir = tempdir();
    let mut args = vec!["simulate"];
    args.extend(REGIMEN);
    args.extend(["--cl", "4.2", "--v", "48", "--at", "1,2h,90min,0.5d,-1", "--format", "csv"]);
    let ran = ok(dir.path(), &args);
    let (_, rows) = csv_records(&ran.stdout);
    let times: Vec<f64> = rows.iter().map(|r| number(&r[0])).collect();
    let given = [1.0, 2.0, 1.5, 12.0, -1.0];
    for (t, g) in times.iter().zip(given) {
        assert_rel(*t, g, 1e-15, 1.0, "time given with --at");
    }
    assert_eq!(times.len(), given.len());
    let expected = engine::concentrations(&Params::iv(4.2, 48.0), &regimen_doses(), &times);
    for (row, e) in rows.iter().zip(expected) {
        assert_same_f64(number(&row[1]), e, "concentration at an --at time");
    }
    // Before the first dose there is no drug.
    assert_eq!(rows[4][1], "0.0");
}

/// An invented dose history for two fictional subjects (not patient data).
const SUBJECT_DOSES: &str = "\
# invented for a test: two fictional subjects, not patient data
subject,time_h,amount_mg,route,duration_min,every_h,count,note
b,0,1000,infusion,60,12,3,first course
\"ward 3, bed 2\",6,500,bolus,,,,
b,36,750,infusion,90,,,changed dose
";

#[test]
fn simulate_a_doses_file_with_subjects() {
    let dir = tempdir();
    std::fs::write(dir.path().join("doses.csv"), SUBJECT_DOSES).unwrap();
    let ran = ok(
        dir.path(),
        &[
            "simulate",
            "--doses",
            "doses.csv",
            "--cl",
            "4.2",
            "--v",
            "48",
            "--times",
            "0:48h:2h",
            "--format",
            "csv",
        ],
    );
    // The note column is not read, and its rows differ: a warning, not a note.
    assert!(ran.stderr.contains("warning: doses.csv: column 'note' is ignored"), "{}", ran.stderr);

    let (header, rows) = csv_records(&ran.stdout);
    assert_eq!(header, ["subject", "time_h", "conc_mg_l"]);
    let times: Vec<f64> = (0..=24).map(|i| f64::from(i) * 2.0).collect();
    // The same histories written out by hand: subjects in order of first appearance.
    let infusion = |time_h: f64, amount_mg: f64, duration_h: f64| Dose {
        time_h,
        amount_mg,
        route: Route::Infusion,
        duration_h,
    };
    let b = [infusion(0.0, 1000.0, 1.0), infusion(12.0, 1000.0, 1.0), infusion(24.0, 1000.0, 1.0)]
        .into_iter()
        .chain([infusion(36.0, 750.0, 1.5)])
        .collect::<Vec<_>>();
    let ward = [Dose { time_h: 6.0, amount_mg: 500.0, route: Route::Bolus, duration_h: 0.0 }];
    let params = Params::iv(4.2, 48.0);
    let expected: Vec<(&str, f64, f64)> = [("b", &b[..]), ("ward 3, bed 2", &ward[..])]
        .into_iter()
        .flat_map(|(who, doses)| {
            let conc = engine::concentrations(&params, doses, &times);
            times.iter().zip(conc).map(move |(t, c)| (who, *t, c)).collect::<Vec<_>>()
        })
        .collect();
    assert_eq!(rows.len(), expected.len());
    for (row, (who, t, c)) in rows.iter().zip(&expected) {
        assert_eq!(row[0], *who);
        assert_same_f64(number(&row[1]), *t, "time");
        assert_same_f64(number(&row[2]), *c, &format!("subject {who} at {t} h"));
    }
    // Exact identity of the model, IV bolus: C(t) = D/V·e^(−k(t − t_dose)) after the dose.
    let k = 4.2 / 48.0;
    for row in rows.iter().filter(|r| r[0] == "ward 3, bed 2") {
        let t = number(&row[1]);
        let exact = if t < 6.0 { 0.0 } else { 500.0 / 48.0 * (-k * (t - 6.0)).exp() };
        assert_rel(number(&row[2]), exact, 1e-12, 1e-300, &format!("bolus solution at {t} h"));
    }
    // One exact AUC per subject, over the simulated span.
    let aucs = auc_notes(&ran.stderr);
    assert_same_f64(aucs[0], engine::auc(&params, &b, 0.0, 48.0), "AUC of b");
    assert_same_f64(aucs[1], engine::auc(&params, &ward, 0.0, 48.0), "AUC of the ward subject");
}

/// The keys of a JSON object, sorted.
fn keys(v: &Value) -> Vec<&str> {
    let mut k: Vec<&str> = v.as_object().expect("a JSON object").keys().map(String::as_str).collect();
    k.sort_unstable();
    k
}

fn json(text: &str) -> Value {
    serde_json::from_str(text).unwrap_or_else(|e| panic!("not JSON ({e}):\n{text}"))
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("{v} is not a number"))
}

/// serde_json's default float parser may miss the nearest f64 by an ulp, so JSON numbers are
/// compared within a few ulps; the bit-exact round trip is checked on the CSV output.
const JSON_TOL: f64 = 1e-15;

#[test]
fn simulate_json_has_one_curve_per_subject_and_the_caution() {
    let dir = tempdir();
    let mut args = vec!["simulate"];
    args.extend(REGIMEN);
    args.extend(["--cl", "4.2", "--v", "48", "--times", "0:24:0.25", "--format", "json"]);
    let doc = json(&ok(dir.path(), &args).stdout);
    assert_eq!(keys(&doc), ["caution", "subjects"]);
    assert_eq!(doc["caution"], CAUTION);
    let curves = doc["subjects"].as_array().unwrap();
    assert_eq!(curves.len(), 1);
    let c = &curves[0];
    assert_eq!(keys(c), ["auc_from_h", "auc_mg_h_l", "auc_to_h", "conc_mg_l", "subject", "time_h"]);
    assert!(c["subject"].is_null());
    let times: Vec<f64> = c["time_h"].as_array().unwrap().iter().map(f).collect();
    let conc: Vec<f64> = c["conc_mg_l"].as_array().unwrap().iter().map(f).collect();
    assert_eq!((times.len(), conc.len()), (97, 97));
    let params = Params::iv(4.2, 48.0);
    let expected = engine::concentrations(&params, &regimen_doses(), &times);
    for (got, e) in conc.iter().zip(expected) {
        assert_rel(*got, e, JSON_TOL, 1e-300, "JSON concentration");
    }
    assert_rel(f(&c["auc_from_h"]), 0.0, 0.0, 1.0, "AUC start");
    assert_rel(f(&c["auc_to_h"]), 24.0, 0.0, 1.0, "AUC end");
    let auc = engine::auc(&params, &regimen_doses(), 0.0, 24.0);
    assert_rel(f(&c["auc_mg_h_l"]), auc, JSON_TOL, 1.0, "JSON AUC");

    // A file with subjects: one curve each, named, in order of first appearance.
    std::fs::write(dir.path().join("doses.csv"), SUBJECT_DOSES).unwrap();
    let args =
        ["simulate", "--doses", "doses.csv", "--cl", "4.2", "--v", "48", "--at", "1,7", "--format", "json"];
    let doc = json(&ok(dir.path(), &args).stdout);
    let names: Vec<&Value> = doc["subjects"].as_array().unwrap().iter().map(|c| &c["subject"]).collect();
    assert_eq!(names, ["b", "ward 3, bed 2"]);
}

/// `cistern exposure ARGS --format json`, parsed.
fn exposure_json(dir: &Path, args: &[&str]) -> Value {
    let all: Vec<&str> =
        ["exposure"].into_iter().chain(args.iter().copied()).chain(["--format", "json"]).collect();
    json(&ok(dir, &all).stdout)
}

#[test]
fn exposure_json_carries_the_library_metrics_and_the_published_case() {
    let dir = tempdir();
    // Reference case 8 (docs/references.md): 400 mg over 1 h every 36 h, ke 0.092 /h,
    // V 20.4 L; values derived from the intermittent-infusion formulas of Sawchuk & Zaske,
    // J Pharmacokinet Biopharm 1976;4:183 (citation recalled from memory).
    let doc = exposure_json(
        dir.path(),
        &[
            "--dose",
            "400mg",
            "--every",
            "36h",
            "--route",
            "infusion",
            "--duration",
            "1h",
            "--k",
            "0.092/h",
            "--v",
            "20.4",
        ],
    );
    assert_eq!(doc["caution"], CAUTION);
    let p = &doc["parameters"];
    let s = &doc["steady_state"];
    for key in ["cl_l_h", "v_l", "k_per_h", "half_life_h", "time_constant_h"] {
        assert!(p[key].is_number(), "parameters.{key} missing in {p}");
    }
    for key in [
        "peak_mg_l",
        "trough_mg_l",
        "auc_tau_mg_h_l",
        "auc24_mg_h_l",
        "cavg_mg_l",
        "accumulation_ratio",
        "time_to_90pct_h",
        "time_to_95pct_h",
        "loading_dose_mg",
    ] {
        assert!(s[key].is_number(), "steady_state.{key} missing in {s}");
    }
    let (peak, trough) = (f(&s["peak_mg_l"]), f(&s["trough_mg_l"]));
    assert_published(
        peak,
        "intermittent infusion, steady-state Cmax",
        "Sawchuk–Zaske case: steady-state peak",
    );
    assert_published(
        trough,
        "intermittent infusion, steady-state Cmin",
        "Sawchuk–Zaske case: steady-state trough",
    );

    // Every steady-state number is the library's, and the parameters are as given.
    let params = Params::iv(0.092 * 20.4, 20.4);
    let dose = Regimen { amount_mg: 400.0, route: Route::Infusion, duration_h: 1.0, every_h: 36.0 };
    let metrics = serde_json::to_value(SteadyCurve::new(&params, dose).unwrap().metrics()).unwrap();
    assert_eq!(keys(s), keys(&metrics));
    for key in keys(&metrics) {
        assert_rel(f(&s[key]), f(&metrics[key]), JSON_TOL, 1e-300, &format!("steady_state.{key}"));
    }
    assert_rel(f(&p["v_l"]), 20.4, JSON_TOL, 1.0, "V");
    assert_rel(f(&p["k_per_h"]), 0.092, JSON_TOL, 1.0, "k");
    assert_rel(f(&p["cl_l_h"]), 0.092 * 20.4, JSON_TOL, 1.0, "CL = k·V");
    // Common practice, no source: half-life ln 2/k; time constant 1/k = V/CL.
    assert_rel(f(&p["half_life_h"]), std::f64::consts::LN_2 / 0.092, JSON_TOL, 1.0, "half-life");
    assert_rel(f(&p["time_constant_h"]), 1.0 / 0.092, JSON_TOL, 1.0, "time constant");
}

#[test]
fn exposure_auc24_is_the_daily_dose_over_clearance() {
    let dir = tempdir();
    // Reference case 10 (docs/references.md), derived identity AUC24,ss = daily dose/CL:
    // 1000 mg every 12 h with CL 4 L/h → 500 mg·h/L.
    let doc = exposure_json(
        dir.path(),
        &[
            "--dose",
            "1000mg",
            "--every",
            "12h",
            "--route",
            "infusion",
            "--duration",
            "1h",
            "--cl",
            "4",
            "--v",
            "50",
        ],
    );
    let s = &doc["steady_state"];
    let auc24 = "steady-state AUC24, 1000 mg every 12 h, CL 4 L/h";
    assert_published(f(&s["auc24_mg_h_l"]), auc24, "AUC24 = daily dose / CL");
    assert_rel(f(&s["cavg_mg_l"]), 500.0 / 24.0, 1e-12, 1.0, "Cavg = AUC24 / 24 h");
    // Common practice, no source: accumulation ratio 1/(1 − e^(−kτ)); loading dose =
    // maintenance dose × accumulation ratio.
    let ratio = 1.0 / -(-0.08f64 * 12.0).exp_m1();
    assert_rel(f(&s["accumulation_ratio"]), ratio, 1e-12, 1.0, "accumulation ratio");
    assert_rel(f(&s["loading_dose_mg"]), 1000.0 * ratio, 1e-12, 1.0, "loading dose");
}

#[test]
fn the_caution_travels_with_every_format() {
    let dir = tempdir();
    let regimen =
        ["--dose", "1g", "--every", "12h", "--count", "2", "--duration", "1h", "--cl", "4.2", "--v", "48"];
    for command in ["simulate", "exposure"] {
        for format in ["table", "csv", "json"] {
            let mut args = vec![command];
            args.extend(regimen);
            if command == "simulate" {
                args.extend(["--times", "0:24:6"]);
            }
            args.extend(["--format", format]);
            let ran = ok(dir.path(), &args);
            let what = format!("{command} --format {format}");
            match format {
                "table" => assert!(ran.stdout.contains(CAUTION), "{what}:\n{}", ran.stdout),
                "csv" => {
                    assert!(!ran.stdout.contains("clinical"), "{what}: CSV must stay data");
                    assert!(ran.stderr.contains(CAUTION), "{what}:\n{}", ran.stderr);
                    csv_records(&ran.stdout);
                }
                _ => assert_eq!(json(&ran.stdout)["caution"], CAUTION, "{what}"),
            }
        }
    }
}

#[test]
fn output_file_is_written_whole_and_alone() {
    let dir = tempdir();
    let args = ["exposure", "--dose", "1g", "--every", "12h", "--duration", "1h", "--cl", "4.2", "--v", "48"];
    let to_stdout = ok(dir.path(), &[&args[..], &["--format", "json"]].concat());
    // The format follows the extension; nothing goes to stdout; no temporary file is left.
    let to_file = ok(dir.path(), &[&args[..], &["-o", "out.json"]].concat());
    assert_eq!(to_file.stdout, "");
    assert_eq!(entries(dir.path()), ["out.json"]);
    assert_eq!(std::fs::read_to_string(dir.path().join("out.json")).unwrap(), to_stdout.stdout);

    // An existing output is replaced, and `-o -` is stdout.
    ok(dir.path(), &[&args[..], &["--format", "csv", "-o", "out.json"]].concat());
    assert!(std::fs::read_to_string(dir.path().join("out.json")).unwrap().starts_with("cl_l_h,"));
    let dash = ok(dir.path(), &[&args[..], &["--format", "json", "-o", "-"]].concat());
    assert_eq!(dash.stdout, to_stdout.stdout);
}

#[test]
fn output_never_overwrites_an_input() {
    let dir = tempdir();
    std::fs::create_dir(dir.path().join("sub")).unwrap();
    let input = dir.path().join("doses.csv");
    std::fs::write(&input, SUBJECT_DOSES).unwrap();
    for target in ["doses.csv", "./doses.csv", "sub/../doses.csv"] {
        let ran = cistern(
            dir.path(),
            &["simulate", "--doses", "doses.csv", "--cl", "4.2", "--v", "48", "--at", "1", "-o", target],
        );
        assert_eq!(ran.code, 2, "-o {target}: {}", ran.stderr);
        assert!(ran.stderr.contains("refusing to write the output over the input file"), "{}", ran.stderr);
        assert_eq!(std::fs::read_to_string(&input).unwrap(), SUBJECT_DOSES, "-o {target} touched the input");
        assert_eq!(entries(dir.path()), ["doses.csv", "sub"]);
    }
}

#[test]
fn unit_suffixes_convert_to_base_units() {
    let dir = tempdir();
    let base = [
        "--dose",
        "1000mg",
        "--every",
        "12h",
        "--route",
        "infusion",
        "--duration",
        "1h",
        "--cl",
        "3.9",
        "--v",
        "48",
    ];
    let reference = exposure_json(dir.path(), &base);
    // Each pair: a flag and a spelling of its base-unit value in another unit
    // (65 mL/min = 65·60/1000 L/h = 3.9 L/h).
    let spellings = [
        ("--dose", "1g"),
        ("--dose", "1000000mcg"),
        ("--cl", "65ml/min"),
        ("--cl", "65mL/min"),
        ("--cl", "3.9l/h"),
        ("--every", "720min"),
        ("--every", "0.5d"),
        ("--duration", "60min"),
        ("--v", "48000ml"),
        ("--v", "48L"),
    ];
    for (flag, value) in spellings {
        let mut args = base;
        let i = args.iter().position(|a| *a == flag).unwrap();
        args[i + 1] = value;
        let doc = exposure_json(dir.path(), &args);
        for block in ["parameters", "steady_state", "regimen"] {
            for key in keys(&reference[block]) {
                let (a, b) = (&doc[block][key], &reference[block][key]);
                if b.is_number() {
                    assert_rel(f(a), f(b), 1e-12, 1e-300, &format!("{flag} {value}: {block}.{key}"));
                }
            }
        }
    }
}

#[test]
fn every_help_shows_a_worked_example() {
    let dir = tempdir();
    for command in ["simulate", "exposure", "check"] {
        let ran = ok(dir.path(), &[command, "--help"]);
        assert!(ran.stdout.contains("Examples:"), "{command} --help:\n{}", ran.stdout);
        assert!(
            ran.stdout.lines().any(|l| l.trim_start().starts_with(&format!("cistern {command} "))),
            "{command} --help has no example command line:\n{}",
            ran.stdout
        );
    }
}

#[test]
fn check_passes_a_valid_file_and_reports_every_problem_of_a_bad_one() {
    let dir = tempdir();
    std::fs::write(dir.path().join("good.csv"), SUBJECT_DOSES).unwrap();
    // Four problems in the rows, of four kinds.
    let bad_rows = "time_h,amount_mg,route,duration_h\n\
                    0,1000,infusion,1\n\
                    12,1000,drip,1\n\
                    24,1000,infusion,1\n\
                    noon,1000,infusion,1\n\
                    48,-1000,infusion,1\n\
                    60,1000,infusion,\n";
    // Three problems in the file's structure.
    let bad_shape = "time_h,amount_mg,route,amount_mg\n0,1,bolus,1\n1,1,bolus\n2,1,bolus,1,1\n";
    std::fs::write(dir.path().join("rows.csv"), bad_rows).unwrap();
    std::fs::write(dir.path().join("shape.csv"), bad_shape).unwrap();

    let ran = ok(dir.path(), &["check", "good.csv"]);
    assert!(ran.stdout.contains("ok: good.csv"), "{}", ran.stdout);

    let ran = cistern(dir.path(), &["check", "rows.csv", "good.csv", "shape.csv"]);
    assert_eq!(ran.code, 2);
    assert!(ran.stdout.contains("ok: good.csv"), "{}", ran.stdout);
    let expected = [
        "rows.csv: line 3, column route",
        "rows.csv: line 5, column time_h",
        "rows.csv: line 6, column amount_mg",
        "rows.csv: line 7, column duration_h",
        "shape.csv: line 1, column amount_mg: duplicate column",
        "shape.csv: line 3: expected 4 fields",
        "shape.csv: line 4: expected 4 fields",
    ];
    for located in expected {
        assert!(ran.stderr.contains(located), "missing '{located}' in:\n{}", ran.stderr);
    }
    assert_eq!(
        ran.stderr.lines().filter(|l| l.starts_with("error: ")).count(),
        expected.len(),
        "{}",
        ran.stderr
    );
}
