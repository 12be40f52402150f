//! The library as a Rust user calls it: analyses through the spec and the workflow, errors that
//! carry where a value came from, and a batch whose failing subject does not abort the others.

use crate::common::{cistern_at, demo_args, demo_copy};
use cistern::spec::{Needs, Spec, Stated};
use cistern::workflow::{Required, Study};
use cistern::{Error, Origin, case};
use std::path::{Path, PathBuf};

fn demo(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-regimens").join(file)
}

#[test]
fn a_case_value_at_fault_is_reported_at_its_key_and_line_and_a_flag_over_it_at_the_flag() {
    let dir = demo_copy();
    let text = std::fs::read_to_string(dir.path().join("p01.toml")).unwrap();
    let line = text.lines().position(|l| l.starts_with("max_dose")).unwrap() as u64 + 1;
    std::fs::write(dir.path().join("p01.toml"), text.replace("max_dose = \"2.5g\"", "max_dose = \"-2.5g\""))
        .unwrap();
    let path = dir.path().join("p01.toml");
    let mut spec = case::read(path.to_str().unwrap()).unwrap();
    let Err(Error::Input(problems)) = spec.resolve(Needs { grid: true }) else {
        panic!("a negative dose limit")
    };
    assert_eq!(problems.len(), 1, "{problems:?}");
    assert_eq!(problems[0].origin, Origin::key(path.to_str().unwrap(), Some(line), "limits.max_dose"));
    assert!(problems[0].message.contains("must be positive"), "{}", problems[0]);
    // No library message names a flag.
    assert!(!problems[0].to_string().contains("--"), "{}", problems[0]);
    spec.grid.limits.max_dose.set("--max-dose", Some("-1g".into()));
    let Err(Error::Input(problems)) = spec.resolve(Needs { grid: true }) else { panic!("still negative") };
    assert_eq!(problems[0].origin, Origin::Flag("--max-dose".into()));
}

#[test]
fn a_missing_setting_is_reported_where_it_would_be_given() {
    let mut spec = Spec::new();
    spec.inputs.doses = Stated { value: Some(demo("doses.csv")), origin: Origin::Flag("--doses".into()) };
    let Err(Error::Input(problems)) = Study::load(&spec.inputs, Required { model: true, levels: true })
    else {
        panic!("no levels and no model")
    };
    let places: Vec<String> = problems.iter().map(|p| p.origin.to_string()).collect();
    assert_eq!(places, ["inputs.levels", "inputs.model"], "{problems:?}");
}

#[test]
fn errors_convert_with_the_question_mark_in_a_users_program() {
    fn user() -> Result<(), Box<dyn std::error::Error>> {
        case::read("no/such/case.toml")?;
        Ok(())
    }
    let e = user().unwrap_err();
    assert!(e.to_string().starts_with("no/such/case.toml: "), "{e}");
}

#[test]
fn a_subject_that_cannot_be_fitted_does_not_abort_the_others() {
    // Without the model's [absorption] table the oral doses of P03 have no prior for ka: P03
    // fails, P01 and P02 are still fitted and written, and the run exits 1 naming P03.
    let dir = demo_copy();
    let model = std::fs::read_to_string(dir.path().join("model.toml")).unwrap();
    let start = model.find("[absorption]").unwrap();
    let end = model.find("[residual]").unwrap();
    std::fs::write(dir.path().join("model.toml"), format!("{}{}", &model[..start], &model[end..])).unwrap();
    let args = demo_args("fit", &["--format", "csv", "--draws", "200"]);
    let ran = cistern_at(dir.path(), &args, "0");
    assert_eq!(ran.code, 1, "{}", ran.stderr);
    let subjects: Vec<&str> = ran.stdout.lines().skip(1).filter_map(|l| l.split(',').next()).collect();
    assert_eq!(subjects, ["P01", "P02"], "{}", ran.stdout);
    assert!(ran.stderr.contains("1 of 3 subjects could not be fitted"), "{}", ran.stderr);
    assert!(ran.stderr.contains("subject P03: oral doses"), "{}", ran.stderr);
}

#[test]
fn a_malformed_source_date_epoch_is_refused_not_ignored() {
    // Found by a fault campaign: `abc`, `1e9` and 2^64 were silently ignored, so a report
    // meant to be reproducible was not.
    let dir = demo_copy();
    for epoch in ["abc", "1e9", "18446744073709551616"] {
        let ran = cistern_at(dir.path(), &["report", "p01.toml", "-o", "out.pdf"], epoch);
        assert_eq!(ran.code, 2, "{epoch}: {}", ran.stderr);
        assert!(ran.stderr.contains("SOURCE_DATE_EPOCH"), "{epoch}: {}", ran.stderr);
        assert!(!dir.path().join("out.pdf").exists(), "{epoch}: nothing written");
    }
}
