//! Messages that name the real cause, and columns that are never silently misread: each case
//! runs the real binary on the input that showed the problem and checks the exit code and the
//! message (file, line, column or key, the value entered).

use crate::common::{DEMO_STUDY, ONE_REGIMEN, Ran, cistern_at, demo_copy};
use std::path::Path;

/// Run `cistern ARGS` in `dir`.
fn run(dir: &Path, args: &[&str]) -> Ran {
    cistern_at(dir, args, "0")
}

/// Run and expect exit code 2; the standard error.
#[track_caller]
fn refused(dir: &Path, args: &[&str]) -> String {
    let ran = run(dir, args);
    assert_eq!(ran.code, 2, "cistern {args:?} should be refused:\n{}", ran.stderr);
    assert!(!ran.stderr.contains("panicked"), "{}", ran.stderr);
    ran.stderr
}

fn write(dir: &Path, name: &str, bytes: &[u8]) {
    std::fs::write(dir.join(name), bytes).unwrap();
}

/// One invented subject S1: a 1 g infusion and two levels (not patient data).
fn one_subject(dir: &Path) {
    write(dir, "d.csv", b"subject,time_h,amount_mg,route,duration_h\nS1,0,1000,infusion,1\n");
    write(dir, "l.csv", b"subject,time_h,conc_mg_l\nS1,2,20\nS1,10,10\n");
}

const FIT: [&str; 7] = ["fit", "--model", "model.toml", "--doses", "d.csv", "--levels", "l.csv"];

fn fit_with<'a>(rest: &[&'a str]) -> Vec<&'a str> {
    FIT.iter().copied().chain(rest.iter().copied()).collect()
}

#[test]
fn a_zero_serum_creatinine_names_the_file_line_and_value_entered() {
    // Was: `subject S1: the covariate 'crcl_ml_min' = inf gives a non-positive typical value`,
    // with no file, and the entered covariate never mentioned.
    let dir = demo_copy();
    one_subject(dir.path());
    write(dir.path(), "c.csv", b"subject,age_y,sex,weight_kg,scr_mg_dl\nS1,60,M,70,0\n");
    let err = refused(dir.path(), &fit_with(&["--covariates", "c.csv"]));
    assert!(
        err.contains(
            "error: c.csv: line 2, column scr_mg_dl: subject S1: scr_mg_dl = 0 gives an infinite crcl_ml_min"
        ),
        "{err}"
    );
    assert!(!err.contains("non-positive"), "{err}");
    // The same value given on the command line names the flag.
    let flags = ["--covariate", "age_y=60", "--covariate", "sex=M", "--covariate", "weight_kg=70"];
    let err = refused(dir.path(), &fit_with(&[&flags[..], &["--covariate", "scr_mg_dl=0"]].concat()));
    assert!(err.contains("error: --covariate: scr_mg_dl = 0 gives an infinite crcl_ml_min"), "{err}");
}

#[test]
fn a_covariate_that_gives_a_zero_typical_value_names_where_it_was_entered() {
    let dir = demo_copy();
    one_subject(dir.path());
    write(dir.path(), "c.csv", b"subject,weight_kg,crcl_ml_min\nS1,70,0\n");
    let err = refused(dir.path(), &fit_with(&["--covariates", "c.csv"]));
    assert!(
        err.contains("c.csv: line 2, column crcl_ml_min: subject S1: crcl_ml_min = 0 gives a typical value of zero or less"),
        "{err}"
    );
}

#[test]
fn an_empty_covariate_name_is_refused() {
    // Was: `--covariate =5` accepted silently.
    let dir = demo_copy();
    one_subject(dir.path());
    let err = refused(
        dir.path(),
        &fit_with(&["--covariate", "=5", "--covariate", "crcl_ml_min=90", "--covariate", "weight_kg=70"]),
    );
    assert!(err.contains("error: --covariate: expected NAME=VALUE with a covariate name"), "{err}");
    assert!(err.contains("'=5'"), "{err}");
}

#[test]
fn a_negative_seed_names_the_flag() {
    // Was: "unexpected argument '-1'", without the flag.
    let dir = demo_copy();
    one_subject(dir.path());
    let err = refused(dir.path(), &fit_with(&["--seed", "-1"]));
    assert!(err.contains("'--seed <SEED>'") && err.contains("expected a whole number, 0 or more"), "{err}");
    let err = refused(dir.path(), &["simulate", "--cl", "4", "--v", "40", "--dose", "1g", "--count", "-2"]);
    assert!(err.contains("'--count <N>'"), "{err}");
}

#[test]
fn invalid_utf8_in_a_toml_file_gives_the_line() {
    let dir = demo_copy();
    let mut model = std::fs::read(dir.path().join("model.toml")).unwrap();
    let line = model.iter().filter(|&&b| b == b'\n').count() + 1;
    model.extend_from_slice(b"# caf\xe9\n");
    write(dir.path(), "model.toml", &model);
    let err = refused(dir.path(), &["check", "model.toml"]);
    assert!(err.contains(&format!("error: model.toml: line {line}: the text is not valid UTF-8")), "{err}");
}

#[test]
fn a_negative_max_dose_in_a_case_file_names_the_key_and_line_not_a_flag() {
    let dir = demo_copy();
    let case = std::fs::read_to_string(dir.path().join("p01.toml")).unwrap();
    write(dir.path(), "p01.toml", case.replace("max_dose = \"2.5g\"", "max_dose = \"-2.5g\"").as_bytes());
    let err = refused(dir.path(), &["plan", "--case", "p01.toml"]);
    assert!(
        err.contains("error: p01.toml: line 27, key limits.max_dose: the largest dose must be positive"),
        "{err}"
    );
    assert!(!err.contains("--max-dose"), "{err}");
}

#[test]
fn control_characters_and_inner_byte_order_marks_in_identifiers_are_refused() {
    // Was: printed raw to the terminal; a byte-order mark at the start of line 2 made `\u{feff}S1`
    // a second subject.
    let dir = demo_copy();
    one_subject(dir.path());
    write(
        dir.path(),
        "l.csv",
        b"subject,time_h,conc_mg_l\nS1,2,20\n\xef\xbb\xbfS1,10,10\nS\x1b[2J,4,3\nS\x002,5,1\n",
    );
    let err = refused(dir.path(), &["check", "l.csv"]);
    assert!(
        err.contains("l.csv: line 3, column subject: the field holds an invisible character (U+FEFF)"),
        "{err}"
    );
    assert!(
        err.contains("l.csv: line 4, column subject: the field holds an invisible character (U+001B)"),
        "{err}"
    );
    assert!(
        err.contains("l.csv: line 5, column subject: the field holds an invisible character (U+0000)"),
        "{err}"
    );
    assert!(!err.contains('\u{1b}') && !err.contains('\0'), "nothing raw reaches the terminal: {err:?}");
}

#[test]
fn an_escape_sequence_given_on_the_command_line_is_printed_escaped() {
    let dir = demo_copy();
    let err = refused(dir.path(), &["plan", "--case", "p01.toml", "--subject", "P\u{1b}[2J"]);
    assert!(err.contains("--subject: no subject 'P\\u{1b}[2J'"), "{err}");
    assert!(!err.contains('\u{1b}'), "{err:?}");
}

#[test]
fn an_identifier_column_not_named_subject_is_refused_not_merged() {
    // Was: exit 0, one subject fitted from two people's data, with only a note.
    let dir = demo_copy();
    write(
        dir.path(),
        "doses3.csv",
        b"ID,time_h,amount_mg,route,duration_h\nA1,0,1000,infusion,1\nA2,0,500,infusion,1\n",
    );
    write(dir.path(), "levels3.csv", b"ID,time_h,conc_mg_l\nA1,2,20\nA2,3,10\n");
    let args = [
        "fit",
        "--model",
        "model.toml",
        "--doses",
        "doses3.csv",
        "--levels",
        "levels3.csv",
        "--covariate",
        "weight_kg=70",
        "--covariate",
        "crcl_ml_min=90",
    ];
    let err = refused(dir.path(), &args);
    for file in ["doses3.csv", "levels3.csv"] {
        let want = format!(
            "error: {file}: line 1, column ID: column 'ID' looks like a subject identifier: name it 'subject'"
        );
        assert!(err.contains(&want), "{err}");
    }
    for header in ["patient", "Subject_ID", "USUBJID"] {
        write(dir.path(), "c.csv", format!("{header},weight_kg\nA1,70\n").as_bytes());
        let err = refused(dir.path(), &["check", "c.csv"]);
        assert!(err.contains(&format!("column '{header}' looks like a subject identifier")), "{err}");
    }
}

#[test]
fn column_names_are_matched_in_any_case_and_a_varying_ignored_column_is_a_warning() {
    let dir = demo_copy();
    write(
        dir.path(),
        "d.csv",
        b"Subject,Time_H,AMOUNT_MG,Route,Duration_h,site\nA1,0,1000,infusion,1,x\nA2,0,500,infusion,1,y\n",
    );
    let ran = run(dir.path(), &["check", "-q", "d.csv"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stdout.contains("ok: d.csv: doses file, 2 subject(s), 2 dose(s)"), "{}", ran.stdout);
    // A warning, shown even with -q: the rows differ in a column nobody reads.
    assert!(
        ran.stderr.contains(
            "warning: d.csv: column 'site' is ignored, though its rows differ ('x' on line 2, 'y' on line 3)"
        ),
        "{}",
        ran.stderr
    );
    // A column holding one value throughout is only a note.
    write(
        dir.path(),
        "d.csv",
        b"subject,time_h,amount_mg,route,duration_h,site\nA1,0,1,infusion,1,x\nA2,0,5,infusion,1,x\n",
    );
    let ran =
        run(dir.path(), &["simulate", "--doses", "d.csv", "--cl", "4", "--v", "40", "--times", "0:2:1"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(
        ran.stderr.contains("note: d.csv: ignored columns: site") && !ran.stderr.contains("warning"),
        "{}",
        ran.stderr
    );
    // Two columns that differ only in case are one column given twice.
    write(dir.path(), "d.csv", b"subject,time_h,amount_mg,route,Subject\nA1,0,1,bolus,A1\n");
    let err = refused(dir.path(), &["check", "d.csv"]);
    assert!(err.contains("d.csv: line 1, column Subject: duplicate column 'Subject'"), "{err}");
}

#[test]
fn forgetting_the_covariates_file_is_one_error_naming_the_cause() {
    // Was: one identical error per subject, blamed on --covariates.
    let dir = demo_copy();
    let (mut doses, mut levels) = (
        String::from("subject,time_h,amount_mg,route,duration_h\n"),
        String::from("subject,time_h,conc_mg_l\n"),
    );
    for i in 1..=50 {
        doses += &format!("S{i:02},0,1000,infusion,1\n");
        levels += &format!("S{i:02},2,20\nS{i:02},10,10\n");
    }
    write(dir.path(), "d.csv", doses.as_bytes());
    write(dir.path(), "l.csv", levels.as_bytes());
    let err = refused(dir.path(), &FIT);
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(
        err.contains("the model needs covariates, and none were given: 'crcl_ml_min' is not given"),
        "{err}"
    );
    // A covariates file that lacks a column for every subject: one line with the count.
    let mut cov = String::from("subject,age_y,sex,weight_kg\n");
    for i in 1..=50 {
        cov += &format!("S{i:02},60,F,70\n");
    }
    write(dir.path(), "c.csv", cov.as_bytes());
    let err = refused(dir.path(), &fit_with(&["--covariates", "c.csv"]));
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(
        err.contains("error: c.csv: 50 subjects (S01, S02, S03, …): 'crcl_ml_min' is not given"),
        "{err}"
    );
}

#[test]
fn time_units_take_their_common_spellings() {
    let dir = demo_copy();
    let sim = |every: &str, duration: &str| {
        let args = [
            "simulate",
            "--cl",
            "4",
            "--v",
            "40",
            "--dose",
            "1g",
            "--every",
            every,
            "--count",
            "2",
            "--duration",
            duration,
            "--times",
            "0:24h:6h",
            "--format",
            "csv",
        ];
        let ran = run(dir.path(), &args);
        assert_eq!(ran.code, 0, "{every} {duration}: {}", ran.stderr);
        ran.stdout
    };
    let reference = sim("12h", "1h");
    for (every, duration) in [
        ("12hr", "60min"),
        ("12hrs", "1hour"),
        ("12hours", "60minutes"),
        ("0.5day", "1 hours"),
        ("0.5days", "60 minute"),
    ] {
        assert_eq!(sim(every, duration), reference, "{every} {duration}");
    }
    write(dir.path(), "d.csv", b"time_hours,amount_mg,route,duration_minutes\n0,1000,infusion,60\n");
    let ran = run(dir.path(), &["check", "d.csv"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
}

#[test]
fn check_recognises_every_input_kind() {
    // Was: a case file was read as a population model, and failed.
    let dir = demo_copy();
    let ran = run(dir.path(), &["check", "p01.toml"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(
        ran.stdout.contains("ok: p01.toml: case file, 3 subject(s) in its study, subject P01"),
        "{}",
        ran.stdout
    );
    let study = [&DEMO_STUDY[..], &["--draws", "200"]].concat();
    let fit = |rest: &[&str]| {
        let ran = run(dir.path(), &[&["fit"][..], &study, rest].concat());
        assert_eq!(ran.code, 0, "{}", ran.stderr);
    };
    fit(&["--format", "json", "--keep-draws", "100", "-o", "fits.json"]);
    fit(&["--format", "csv", "-o", "fits.csv"]);
    let sweep = [&["sweep", "--params", "fits.csv"][..], &ONE_REGIMEN].concat();
    let ran = run(dir.path(), &[&sweep[..], &["--shard", "1/2", "-o", "state.json"]].concat());
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let ran = run(dir.path(), &["check", "fits.json", "fits.csv", "state.json"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(
        ran.stdout.contains("ok: fits.json: fit results, 3 subject(s), 3 with posterior draws"),
        "{}",
        ran.stdout
    );
    assert!(ran.stdout.contains("ok: fits.csv: parameters file, 3 subject(s)"), "{}", ran.stdout);
    assert!(ran.stdout.contains("ok: state.json: sweep state, 1 of 2 shards"), "{}", ran.stdout);
    // A broken case file is checked as a case file: the key and line of its problem.
    let case = std::fs::read_to_string(dir.path().join("p01.toml")).unwrap();
    write(dir.path(), "p01.toml", case.replace("seed = 7", "seed = \"seven\"").as_bytes());
    let err = refused(dir.path(), &["check", "p01.toml"]);
    assert!(err.contains("p01.toml: line 7"), "{err}");
    // sweep --params says clearly that it reads the CSV, not fit's JSON.
    let err = refused(dir.path(), &[&["sweep", "--params", "fits.json"][..], &sweep[3..]].concat());
    assert!(err.contains("fits.json: this is JSON") && err.contains("cistern fit --format csv"), "{err}");
}

#[test]
fn report_takes_the_case_as_the_other_commands_do() {
    let dir = demo_copy();
    let case = std::fs::read_to_string(dir.path().join("p01.toml")).unwrap();
    write(
        dir.path(),
        "p01.toml",
        case.replace("draws = 2000", "draws = 200").replace("subjects = 2000", "subjects = 100").as_bytes(),
    );
    let ran = run(dir.path(), &["report", "--case", "p01.toml", "-o", "r.pdf", "-q"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(dir.path().join("r.pdf").is_file());
    // -q means what it means everywhere: no notes, but the caution stays.
    assert!(ran.stderr.contains("caution:") && !ran.stderr.contains("note:"), "{}", ran.stderr);
    let err = refused(dir.path(), &["report", "-o", "r2.pdf"]);
    assert!(err.contains("--case"), "{err}");
}

#[test]
fn quiet_is_accepted_by_every_command_and_plan_help_has_no_method() {
    let dir = demo_copy();
    for command in ["simulate", "exposure", "fit", "plan", "report", "check", "sweep", "merge", "verify"] {
        let ran = run(dir.path(), &[command, "--help"]);
        assert_eq!(ran.code, 0, "{command}");
        assert!(
            ran.stdout.contains("-q, --quiet")
                && ran.stdout.contains("Print no notes on stderr (errors, warnings and the caution"),
            "{command}: {}",
            ran.stdout
        );
    }
    let help = run(dir.path(), &["plan", "--help"]).stdout;
    assert!(!help.contains("--method"), "{help}");
}

/// Values read from files drew no warning however implausible, unlike the same values given
/// by flags: a 60-hour infusion every 12 h, a dose of a kilogram, a level given in ng/mL in a
/// column named mg/L, a creatinine in µmol/L in a column named mg/dL. Each now draws one
/// warning per column naming the file, the column, the lines (the first few, with the count),
/// the unit the column's name gives and how to name another; the run goes on (exit 0).
#[test]
fn implausible_values_in_files_are_warned_about_per_column() {
    let dir = demo_copy();
    let d = dir.path();
    write(
        d,
        "d.csv",
        b"subject,time_h,amount_mg,route,duration_h,every_h,count\n\
          S1,0,1000,infusion,60,12,3\nS2,0,1000000,infusion,1,12,3\nS3,0,2000000,infusion,14,12,3\n\
          S4,0,3000000,infusion,1,12,3\nS5,0,4000000,infusion,1,12,3\n",
    );
    write(d, "l.csv", b"subject,time_h,conc_mg_l\nS1,2,20000\nS2,2,20\nS3,2,20\nS4,2,20\nS5,2,20\n");
    write(d, "c.csv", b"subject,age_y,sex,weight_kg,scr_mg_dl\nS1,60,F,70,88\nS2,60,M,70,1\nS3,60,M,70,1\nS4,60,M,70,1\nS5,60,M,70,1\n");
    let ran = run(d, &["check", "d.csv", "l.csv", "c.csv"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let warnings: Vec<&str> = ran.stderr.lines().filter(|l| l.starts_with("warning: ")).collect();
    let one = |needles: &[&str]| {
        let found: Vec<_> = warnings.iter().filter(|w| needles.iter().all(|n| w.contains(n))).collect();
        assert_eq!(found.len(), 1, "one warning with {needles:?} in:\n{}", ran.stderr);
    };
    one(&["d.csv: column amount_mg, 4 lines (3, 4, 5, …)", "1000000 mg", "read in mg", "amount_mcg"]);
    one(&["d.csv: column duration_h, 2 lines (2, 4)", "longer than its dosing interval", "duration_min"]);
    one(&["l.csv: column conc_mg_l, line 2", "20000 mg/L", "conc_ug_l"]);
    one(&["c.csv: column scr_mg_dl, line 2", "scr_mg_dl = 88", "scr_umol_l"]);
    assert_eq!(warnings.len(), 4, "{}", ran.stderr);
    // The same through a command that reads the study, and a covariate given by flag.
    let ran = run(
        d,
        &["fit", "--model", "model.toml", "--doses", "d.csv", "--levels", "l.csv", "--covariates", "c.csv"],
    );
    assert!(ran.stderr.contains("warning: c.csv: column scr_mg_dl, line 2"), "{}", ran.stderr);
    assert!(ran.stderr.contains("warning: d.csv: column amount_mg, 4 lines"), "{}", ran.stderr);
    let flags = ["plan", "--model", "model.toml", "--covariate", "age_y=60", "--covariate", "sex=F"];
    let rest = ["--covariate", "weight_kg=70000", "--covariate", "scr_mg_dl=1", "--target", "auc24=400..600"];
    let args: Vec<&str> = flags.iter().chain(&rest).copied().collect();
    let ran = run(d, &args);
    assert!(ran.stderr.contains("warning: --covariate: weight_kg = 70000 is unusual"), "{}", ran.stderr);
}

/// Values of TOML keys drew no warning either: a typical clearance of 0.004 L/h in the model
/// (a half-life of months), a 60-hour infusion and a peak limit of 60,000 mg/L in a case file.
/// Each now draws a warning at its key and line, with the unit the value was read in; the run
/// goes on.
#[test]
fn implausible_values_in_toml_keys_are_warned_about_at_their_key() {
    let dir = demo_copy();
    let d = dir.path();
    let model = std::fs::read_to_string(d.join("model.toml")).unwrap();
    let line = model.lines().position(|l| l.starts_with("typical_l_h")).unwrap() + 1;
    let typical = model.lines().find(|l| l.starts_with("typical_l_h")).unwrap();
    write(d, "slow.toml", model.replace(typical, "typical_l_h = 0.004").as_bytes());
    let ran = run(d, &["check", "slow.toml"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let expected = format!(
        "warning: slow.toml: line {line}, key clearance.typical_l_h: 0.004 L/h is an unusual clearance"
    );
    assert!(ran.stderr.contains(&expected), "{}", ran.stderr);
    assert!(ran.stderr.contains("read in L/h"), "{}", ran.stderr);

    let case = std::fs::read_to_string(d.join("p01.toml")).unwrap();
    let case: String = case
        .lines()
        .map(|l| match l {
            l if l.starts_with("durations =") => "durations = \"1h,60\"".to_string(),
            l if l.starts_with("max_peak =") => "max_peak = \"60000\"".to_string(),
            l => l.replace("subjects = 2000", "subjects = 200"),
        })
        .map(|l| l + "\n")
        .collect();
    write(d, "w.toml", case.as_bytes());
    let at = |key: &str| case.lines().position(|l| l.starts_with(key)).unwrap() + 1;
    for args in [&["plan", "--case", "w.toml", "--draws", "200"][..], &["report", "w.toml", "--draws", "200"]]
    {
        let ran = run(d, args);
        assert_eq!(ran.code, 0, "{args:?}: {}", ran.stderr);
        let durations =
            format!("warning: w.toml: line {}, key plan.durations: an infusion of 60 h", at("durations"));
        let peak = format!(
            "warning: w.toml: line {}, key limits.max_peak: 60000 mg/L is an unusual",
            at("max_peak")
        );
        assert!(
            ran.stderr.contains(&durations) && ran.stderr.contains("read in h"),
            "{args:?}: {}",
            ran.stderr
        );
        assert!(ran.stderr.contains(&peak), "{args:?}: {}", ran.stderr);
    }
}

#[test]
fn all_missing_inputs_are_reported_at_once() {
    // Was: `cistern sweep` with no flags named only --model; fixing it showed the next one.
    let dir = tempfile::tempdir().unwrap();
    let err = refused(dir.path(), &["sweep"]);
    for flag in ["--model", "--target", "--amounts", "--every", "--subjects"] {
        assert!(err.contains(&format!("error: {flag}: ")), "{flag} missing from:\n{err}");
    }
    let err = refused(dir.path(), &["fit"]);
    for flag in ["--doses", "--levels"] {
        assert!(err.contains(&format!("error: {flag}: ")), "{flag} missing from:\n{err}");
    }
    let err = refused(dir.path(), &["plan"]);
    for flag in ["--model", "--target"] {
        assert!(err.contains(&format!("error: {flag}: ")), "{flag} missing from:\n{err}");
    }
}

#[test]
fn derived_amounts_state_the_unit_of_the_target() {
    // Was: "candidates: amounts …: up to twice the amount per dose that puts trough at 7.5 for
    // the point estimate" — a number without its unit.
    let dir = demo_copy();
    let args = [
        &DEMO_STUDY[..],
        &["--subject", "P01", "--draws", "200", "--target", "trough=..15", "--every", "12h", "--no-advice"],
    ]
    .concat();
    let ran = run(dir.path(), &[&["plan"][..], &args, &["--format", "json"]].concat());
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stderr.contains("puts trough at 7.5 mg/L for the point estimate"), "{}", ran.stderr);
    let ran = run(
        dir.path(),
        &[&["plan"][..], &args, &["--target", "auc24=400..600", "--format", "json"]].concat(),
    );
    assert!(ran.stderr.contains("puts trough at 7.5 mg/L"), "the first target: {}", ran.stderr);
}

#[test]
fn levels_of_many_subjects_without_doses_are_one_line() {
    // Was: 30 lines "levels.csv: line N: subject Sxx has levels but no doses in d.csv".
    let dir = demo_copy();
    let mut levels = String::from("subject,time_h,conc_mg_l\nS00,2,20\n");
    for i in 1..=30 {
        levels += &format!("S{i:02},2,20\nS{i:02},10,10\n");
    }
    write(dir.path(), "d.csv", b"subject,time_h,amount_mg,route,duration_h\nS00,0,1000,infusion,1\n");
    write(dir.path(), "l.csv", levels.as_bytes());
    let err =
        refused(dir.path(), &fit_with(&["--covariate", "weight_kg=70", "--covariate", "crcl_ml_min=90"]));
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(
        err.contains("error: l.csv: 30 subjects (S01, S02, S03, …): levels but no doses in d.csv"),
        "{err}"
    );
    // One such subject keeps its line.
    write(dir.path(), "l.csv", b"subject,time_h,conc_mg_l\nS00,2,20\nS07,2,20\n");
    let err =
        refused(dir.path(), &fit_with(&["--covariate", "weight_kg=70", "--covariate", "crcl_ml_min=90"]));
    assert!(err.contains("error: l.csv: line 3: subject S07: levels but no doses in d.csv"), "{err}");
}

#[test]
fn check_reads_a_lambda_z_times_file_as_one() {
    // Was: `cistern check lz.csv` on an `nca --lambda-z-times` file read it as covariates.
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), "lz.csv", b"subject,time_h\nA,8\nA,12\nA,24\nB,6\nB,12\nB,24\n");
    let ran = run(dir.path(), &["check", "lz.csv"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(
        ran.stdout
            .contains("ok: lz.csv: terminal-line times file (nca --lambda-z-times), 2 subject(s), 6 time(s)"),
        "{}",
        ran.stdout
    );
    // Without subjects, and in minutes; a time that does not parse is located.
    write(dir.path(), "one.csv", b"time_min\n480\n720\n");
    let ran = run(dir.path(), &["check", "one.csv"]);
    assert!(ran.stdout.contains("1 subject(s), 2 time(s)"), "{}", ran.stdout);
    write(dir.path(), "bad.csv", b"subject,time_h\nA,8\nA,soon\n");
    let err = refused(dir.path(), &["check", "bad.csv"]);
    assert!(err.contains("bad.csv: line 3, column time_h") && !err.contains("covariate"), "{err}");
}

#[test]
fn unit_hints_suggest_the_unit_in_which_the_value_is_plausible() {
    // Was: `--dose 1000000` suggested `1000000g` (a tonne), `--cl 0.004` suggested `ml/min`
    // (still tinier), `--at 0.001` suggested `min`.
    let dir = tempfile::tempdir().unwrap();
    let sim = |extra: &[&str]| {
        let base =
            ["simulate", "--cl", "4", "--v", "40", "--route", "bolus", "--format", "csv", "-o", "s.csv"];
        let ran = run(dir.path(), &[&base[..], extra].concat());
        assert_eq!(ran.code, 0, "{}", ran.stderr);
        ran.stderr
    };
    let err = sim(&["--dose", "1000000", "--at", "1"]);
    // 1,000,000 µg = 1 g: plausible; 1,000,000 g is not.
    assert!(err.contains("e.g. 1000000mcg)"), "{err}");
    let err = sim(&["--dose", "1g", "--at", "0.001"]);
    // 0.001 d = 1.44 min, the only unit that puts it at or above a minute.
    assert!(err.contains("--at 0.001: ") && err.contains("e.g. 0.001d)"), "{err}");
    let ran = run(
        dir.path(),
        &["simulate", "--dose", "1g", "--cl", "0.004", "--v", "40", "--route", "bolus", "--at", "1"],
    );
    assert!(ran.stderr.contains("--cl 0.004: 0.004 L/h is an unusual clearance"), "{}", ran.stderr);
    assert!(!ran.stderr.contains("ml/min"), "no unit makes 0.004 a plausible clearance: {}", ran.stderr);
}

#[test]
fn infusions_of_separate_rows_that_overlap_are_warned() {
    // Was: 60-h infusions 12 h apart on separate rows (no every_h) passed without a word.
    let dir = tempfile::tempdir().unwrap();
    write(
        dir.path(),
        "d.csv",
        b"time_h,amount_mg,route,duration_h\n0,1000,infusion,60\n12,1000,infusion,60\n24,1000,infusion,60\n",
    );
    let ran = run(dir.path(), &["check", "d.csv"]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(
        ran.stderr.contains(
            "warning: d.csv: column duration_h, 2 lines (2, 3): the infusion lasts past the subject's next dose \
             (a later row), so infusions overlap (read in h, the unit in the column's name; name it \
             duration_min to mean min)"
        ),
        "{}",
        ran.stderr
    );
    // Each subject's doses are its own; infusions that end before the next dose are fine.
    write(dir.path(), "d.csv", b"subject,time_h,amount_mg,route,duration_h\nA,0,1000,infusion,1\nB,0.5,1000,infusion,1\nA,12,1000,infusion,1\n");
    let ran = run(dir.path(), &["check", "d.csv"]);
    assert!(!ran.stderr.contains("overlap"), "{}", ran.stderr);
}

#[test]
fn a_vanishing_auc_prints_as_a_bound_not_its_digits() {
    // Was: "note: AUC from 1000 h to 1001 h = 9.3e-43 mg·h/L".
    let dir = tempfile::tempdir().unwrap();
    let args = [
        "simulate",
        "--dose",
        "1g",
        "--cl",
        "4",
        "--v",
        "40",
        "--route",
        "bolus",
        "--times",
        "1000:1001h:1h",
    ];
    let ran = run(dir.path(), &[&args[..], &["--format", "csv", "-o", "s.csv"]].concat());
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stderr.contains("AUC from 1000 h to 1001 h = < 1e-6 mg·h/L"), "{}", ran.stderr);
    let ran = run(dir.path(), &[&args[..], &["--format", "table"]].concat());
    assert!(ran.stdout.contains("AUC 1000–1001 h = < 1e-6 mg·h/L"), "{}", ran.stdout);
    assert!(!ran.stdout.contains("e-4"), "{}", ran.stdout);
}

#[test]
fn sweep_params_reads_the_fit_csv_and_names_the_csv_for_its_json() {
    // Was: `sweep --params fits.json` failed with a CSV reader's complaint about the JSON.
    let dir = demo_copy();
    let study = [&DEMO_STUDY[..], &["--draws", "200"]].concat();
    for (format, out) in [("json", "fits.json"), ("csv", "fits.csv")] {
        let ran = run(dir.path(), &[&["fit"][..], &study, &["--format", format, "-o", out]].concat());
        assert_eq!(ran.code, 0, "{}", ran.stderr);
    }
    let sweep = [&ONE_REGIMEN[..], &["--format", "json"]].concat();
    let ran = run(dir.path(), &[&["sweep", "--params", "fits.csv"][..], &sweep].concat());
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let v: serde_json::Value = serde_json::from_str(&ran.stdout).unwrap();
    assert_eq!(v["subjects"].as_u64(), Some(3), "{}", ran.stdout);
    let err = refused(dir.path(), &[&["sweep", "--params", "fits.json"][..], &sweep].concat());
    assert!(err.contains("fits.json: this is JSON") && err.contains("cistern fit --format csv"), "{err}");
}

#[test]
fn the_advisor_key_is_interval_narrowing_pct_not_shrinkage() {
    // "shrinkage" means the pull of individual estimates to the population; the advisor's
    // figure is how much one more level narrows an interval, and is named so.
    let dir = demo_copy();
    let args = [
        &["plan"][..],
        &DEMO_STUDY,
        &["--subject", "P01", "--draws", "200", "--format", "json"],
        &ONE_REGIMEN,
    ]
    .concat();
    let ran = run(dir.path(), &args);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let v: serde_json::Value = serde_json::from_str(&ran.stdout).unwrap();
    let times = v["next_level"]["times"].as_array().expect("next-level times");
    assert!(!times.is_empty());
    for t in times {
        let p = t["interval_narrowing_pct"].as_f64().expect("interval_narrowing_pct");
        // At most 100 %; with 200 draws a time that adds nothing may come out a little negative.
        assert!(p.is_finite() && p <= 100.0, "{t}");
        assert!(t.get("shrinkage_pct").is_none(), "{t}");
    }
    assert!(!ran.stdout.contains("shrinkage"), "{}", ran.stdout);
}
