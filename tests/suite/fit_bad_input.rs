//! The bad-input catalog of `cistern fit`: malformed model, covariates and levels files.
//!
//! Each case starts from four valid files (invented data) and breaks one of them. The run
//! must end with exit code 2, print an `error:` line that starts with the file's name (and
//! `line N` where the problem is on a line) and says what is wrong, show no panic, write
//! nothing (`-o out.json` is always given) and leave the inputs as they were.

use crate::common::{DEMO_STUDY, entries};
use std::path::Path;
use std::process::Command;

const MODEL: &str = "# Invented model of a fictional drug.
[clearance]
typical_l_h = 4.0
bsv_cv = 0.30
[[clearance.covariates]]
covariate = \"crcl_ml_min\"
form = \"power\"
reference = 100.0
effect = 0.75
[volume]
typical_l = 50.0
bsv_cv = 0.25
[correlation]
cl_v = 0.3
[residual]
additive_mg_l = 0.5
proportional_cv = 0.10
";

const DOSES: &str = "subject,time_h,amount_mg,route,duration_h
A,0,1000,infusion,1
A,12,1000,infusion,1
B,0,750,infusion,1
B,12,750,infusion,1
";

const LEVELS: &str = "subject,time_h,conc_mg_l
A,13.5,25.1
A,23.5,12.0
B,2,14.2
B,11.5,<0.5
";

const COVARIATES: &str = "subject,age_y,sex,weight_kg,scr_mg_dl
A,62,M,80,1.1
B,45,F,60,0.8
";

const FILES: [&str; 4] = ["model.toml", "doses.csv", "levels.csv", "covariates.csv"];

/// One malformed input.
struct Case {
    /// What is wrong.
    what: &'static str,
    /// Which file is replaced (one of [`FILES`]).
    file: &'static str,
    /// Its replacement text.
    text: String,
    /// The message must start with this after `error: ` (`levels.csv: line 3`).
    names: String,
    /// And contain this phrase.
    says: &'static str,
}

/// `file` with `from` replaced by `to` (which must occur), the problem on `line` (or none).
fn edit(
    what: &'static str,
    file: &'static str,
    from: &str,
    to: &str,
    line: Option<u64>,
    says: &'static str,
) -> Case {
    let good = good(file);
    assert!(good.contains(from), "{what}: '{from}' is not in {file}");
    let text = good.replacen(from, to, 1);
    let names = match line {
        Some(n) => format!("{file}: line {n}"),
        None => format!("{file}: "),
    };
    Case { what, file, text, names, says }
}

fn good(file: &str) -> &'static str {
    match file {
        "model.toml" => MODEL,
        "doses.csv" => DOSES,
        "levels.csv" => LEVELS,
        "covariates.csv" => COVARIATES,
        _ => unreachable!("{file}"),
    }
}

#[rustfmt::skip] // one case per line reads as a table
fn catalog() -> Vec<Case> {
    let m = "model.toml";
    let l = "levels.csv";
    let c = "covariates.csv";
    vec![
        // The population model.
        edit("unknown key", m, "bsv_cv = 0.30\n", "bsv_cv = 0.30\nspread = 2\n", Some(5), "spread"),
        edit("unknown table", m, "[correlation]", "[correlations]", Some(13), "correlations"),
        edit("wrong type", m, "typical_l_h = 4.0", "typical_l_h = \"four\"", Some(3), "expected f64"),
        edit("TOML syntax error", m, "[volume]", "[volume", Some(10), "expected"),
        edit("negative CV", m, "bsv_cv = 0.25", "bsv_cv = -0.25", Some(12), "coefficient of variation"),
        edit("zero CV", m, "bsv_cv = 0.30", "bsv_cv = 0", Some(4), "coefficient of variation"),
        edit("zero typical clearance", m, "typical_l_h = 4.0", "typical_l_h = 0.0", Some(3), "positive"),
        edit("correlation 1", m, "cl_v = 0.3", "cl_v = 1.0", Some(14), "strictly between -1 and 1"),
        edit("correlation below -1", m, "cl_v = 0.3", "cl_v = -1.5", Some(14), "strictly between -1 and 1"),
        edit("unknown covariate form", m, "form = \"power\"", "form = \"cubic\"", Some(7), "power, linear or exponential"),
        edit("power reference zero", m, "reference = 100.0", "reference = 0.0", Some(8), "positive"),
        edit("missing [residual]", m, "[residual]\nadditive_mg_l = 0.5\nproportional_cv = 0.10\n", "", None, "residual"),
        edit("missing typical volume", m, "typical_l = 50.0\n", "", Some(10), "typical_l"),
        edit("zero residual error", m, "additive_mg_l = 0.5\nproportional_cv = 0.10", "additive_mg_l = 0.0\nproportional_cv = 0.0", Some(16), "cannot be zero"),
        edit("negative additive error", m, "additive_mg_l = 0.5", "additive_mg_l = -0.5", Some(16), ">= 0"),
        edit("plausible range reversed", m, "bsv_cv = 0.25\n", "bsv_cv = 0.25\nplausible_l = [100.0, 10.0]\n", Some(13), "low < high"),
        // The covariates.
        edit("a covariate the model needs is missing", c, "B,45,F,60,0.8", "B,45,F,60,", None, "subject B"),
        edit("sex not M/F", c, "B,45,F", "B,45,X", Some(3), "expected M or F, found 'X'"),
        edit("covariate not a number", c, "A,62,M,80", "A,62,M,eighty", Some(2), "'eighty'"),
        edit("negative covariate", c, "A,62", "A,-62", Some(2), "non-negative"),
        edit("subject twice", c, "B,45,F,60,0.8", "A,45,F,60,0.8", Some(3), "appears twice"),
        edit("no subject column", c, "subject,age_y", "patient,age_y", Some(1), "subject column"),
        // The levels.
        edit("level before the first dose", l, "A,13.5,25.1", "A,-1,25.1", Some(2), "subject A: a level at -1 h comes before the first dose at 0 h"),
        edit("duplicate level time", l, "A,23.5,12.0", "A,13.5,12.0", Some(3), "same time"),
        edit("negative level", l, "A,23.5,12.0", "A,23.5,-12.0", Some(3), "cannot be negative"),
        edit("'<' without a number", l, "<0.5", "<", Some(5), "'<' followed by a positive limit"),
        edit("'<' with text", l, "<0.5", "<half", Some(5), "'<' followed by a positive limit"),
        edit("'<' with a negative limit", l, "<0.5", "<-0.5", Some(5), "'<' followed by a positive limit"),
        edit("BLQ without an lloq", l, "<0.5", "BLQ", Some(5), "needs the limit"),
        edit("lloq zero", l, LEVELS, "subject,time_h,conc_mg_l,lloq_mg_l\nA,13.5,25.1,0.5\nA,23.5,12.0,0\n", Some(3), "positive quantification limit"),
        edit("level not a number", l, "A,23.5,12.0", "A,23.5,twelve", Some(3), "'twelve'"),
        edit("time not a number", l, "A,23.5", "A,noon", Some(3), "'noon'"),
        edit("unknown concentration unit", l, "conc_mg_l", "conc_mg_pint", Some(1), "unit"),
        edit("no concentration column", l, "conc_mg_l", "value", Some(1), "concentration column"),
        edit("levels for a subject with no doses", l, "B,2,14.2", "C,2,14.2", Some(4), "subject C: levels but no doses"),
        edit("subject column in one file only", l, "subject,time_h,conc_mg_l\nA,13.5,25.1\nA,23.5,12.0\nB,2,14.2\nB,11.5,<0.5\n", "time_h,conc_mg_l\n13.5,25.1\n", None, "both have a subject column"),
        edit("empty levels file", l, LEVELS, "", None, "empty"),
    ]
}

/// Write the four files, `replace` swapping one of them, into a new directory.
fn setup(replace: Option<(&str, &str)>) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    for f in FILES {
        let text = match replace {
            Some((name, text)) if name == f => text,
            _ => good(f),
        };
        std::fs::write(dir.path().join(f), text).unwrap();
    }
    dir
}

fn run(dir: &Path) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_cistern"))
        .arg("fit")
        .args(DEMO_STUDY)
        .args(["--intervals=laplace", "-o", "out.json"])
        .current_dir(dir)
        .output()
        .expect("the cistern binary runs")
}

/// Every way the run of `case` broke the contract.
fn violations(case: &Case) -> Vec<String> {
    let dir = setup(Some((case.file, &case.text)));
    let out = run(dir.path());
    let stderr = String::from_utf8_lossy(&out.stderr);
    let mut wrong = Vec::new();
    if out.status.code() != Some(2) {
        wrong.push(format!("exit code {:?}, expected 2", out.status.code()));
    }
    if stderr.contains("panicked") || stderr.contains("RUST_BACKTRACE") {
        wrong.push("a panic".into());
    }
    // `line 1` must not match `line 12`.
    let located = stderr.lines().find(|l| {
        l.strip_prefix("error: ")
            .and_then(|m| m.strip_prefix(case.names.as_str()))
            .is_some_and(|rest| !rest.starts_with(|c: char| c.is_ascii_digit()))
    });
    match located {
        None => wrong.push(format!("no message starting 'error: {}'", case.names)),
        Some(line) if !line.contains(case.says) => {
            wrong.push(format!("the message does not say '{}'", case.says))
        }
        Some(_) => {}
    }
    if entries(dir.path()) != entries_of_inputs() {
        wrong.push(format!("files left behind: {:?}", entries(dir.path())));
    }
    for f in FILES {
        let expected = if f == case.file { case.text.as_str() } else { good(f) };
        if std::fs::read_to_string(dir.path().join(f)).unwrap() != expected {
            wrong.push(format!("{f} was changed"));
        }
    }
    if !wrong.is_empty() {
        wrong.push(format!("stderr:\n{stderr}"));
    }
    wrong
}

fn entries_of_inputs() -> Vec<String> {
    let mut names: Vec<String> = FILES.iter().map(|f| f.to_string()).collect();
    names.sort();
    names
}

#[test]
fn the_valid_files_fit() {
    // Without this, every case below could fail for a reason other than its own.
    let dir = setup(None);
    let out = run(dir.path());
    assert_eq!(out.status.code(), Some(0), "{}", String::from_utf8_lossy(&out.stderr));
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("out.json")).unwrap()).unwrap();
    assert_eq!(json["subjects"].as_array().unwrap().len(), 2);
}

#[test]
fn every_malformed_fit_input_is_refused_with_a_located_message() {
    let cases = catalog();
    assert!(cases.len() >= 20);
    let failures: Vec<String> = cases
        .iter()
        .filter_map(|case| {
            let wrong = violations(case);
            (!wrong.is_empty()).then(|| format!("{}:\n  {}", case.what, wrong.join("\n  ")))
        })
        .collect();
    assert!(
        failures.is_empty(),
        "{} of {} cases broke the contract:\n\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}

#[test]
fn absorption_flags_out_of_range_are_refused() {
    // ka must be positive, the lag non-negative and F in (0, 1]; each message names its flag.
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-regimens");
    let file = |name: &str| demo.join(name).to_string_lossy().into_owned();
    for (flag, value, says) in [
        ("--ka", "0", "ka must be positive"),
        ("--ka", "-1/h", "ka must be positive"),
        ("--tlag", "-1h", "the lag time must be non-negative"),
        ("--f", "1.5", "bioavailability F must be in (0, 1]"),
    ] {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"))
            .args(["fit", "--model", &file("model.toml"), "--doses", &file("doses.csv")])
            .args(["--levels", &file("levels.csv"), "--covariates", &file("covariates.csv")])
            .arg(format!("{flag}={value}"))
            .output()
            .expect("run cistern");
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{flag}={value}: {stderr}");
        assert!(stderr.contains(&format!("error: {flag}: {says}")), "{flag}={value}: {stderr}");
        assert!(out.stdout.is_empty(), "{flag}={value} printed results");
    }
}
