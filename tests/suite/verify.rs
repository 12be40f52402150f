//! `cistern verify`, the installation check: the real binary passes every built-in published
//! case, and a case whose expected value is wrong fails, so the check can fail.

use cistern::verify::{Tolerance, cases};
use serde_json::Value;
use std::process::{Command, Output};

fn verify(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_cistern"))
        .arg("verify")
        .args(args)
        .output()
        .expect("the cistern binary runs")
}

#[test]
fn the_installed_binary_passes_at_least_15_published_cases_with_sources() {
    let out = verify(&["--format", "json"]);
    assert_eq!(out.status.code(), Some(0), "{}", String::from_utf8_lossy(&out.stderr));
    let doc: Value = serde_json::from_slice(&out.stdout).expect("JSON on stdout");
    let list = doc["cases"].as_array().expect("a cases array");
    assert!(list.len() >= 15, "only {} cases", list.len());
    for c in list {
        let source = c["source"].as_str().unwrap_or_default();
        assert!(!source.trim().is_empty(), "a case without a source: {c}");
        assert!(["printed", "derived", "common practice"].contains(&c["kind"].as_str().unwrap()), "{c}");
        assert_eq!(c["passed"], Value::Bool(true), "failed: {c}");
        assert!(c["computed"].as_f64().is_some_and(f64::is_finite), "{c}");
    }
    assert_eq!(doc["passed"].as_u64(), Some(list.len() as u64));
    assert_eq!(doc["failed"].as_u64(), Some(0));
    assert!(doc["caution"].as_str().is_some_and(|c| c.contains("Not clinical advice")));
}

#[test]
fn the_table_lists_every_case_with_its_source_and_the_caution() {
    let out = verify(&["--format", "table"]);
    assert_eq!(out.status.code(), Some(0), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8(out.stdout).unwrap();
    for case in cases() {
        let line = text.lines().find(|l| l.contains(case.name)).unwrap_or_else(|| panic!("{}", case.name));
        assert!(line.contains(case.source) && line.contains("pass"), "{line}");
    }
    assert!(text.contains("Not clinical advice"), "{text}");
}

#[test]
fn csv_output_has_a_row_per_case_and_the_caution_on_stderr() {
    let out = verify(&["--format", "csv"]);
    assert_eq!(out.status.code(), Some(0), "{}", String::from_utf8_lossy(&out.stderr));
    let mut reader = csv::Reader::from_reader(&out.stdout[..]);
    let headers = reader.headers().unwrap().clone();
    let passed = headers.iter().position(|h| h == "passed").expect("a passed column");
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), cases().len());
    assert!(rows.iter().all(|r| &r[passed] == "true"));
    assert!(String::from_utf8_lossy(&out.stderr).contains("Not clinical advice"));
}

#[test]
fn a_wrong_expected_value_fails() {
    for mut case in cases() {
        let right = case.check();
        assert!(right.passed, "{right:?}");
        // Move the expected value to twice the tolerance away from the computed one.
        let computed = right.computed.unwrap();
        case.expected = match case.tolerance {
            Tolerance::Absolute(t) => computed + 2.0 * t,
            Tolerance::Relative(t) => computed * (1.0 + 2.0 * t),
        };
        let wrong = case.check();
        assert!(!wrong.passed, "{} passed with expected {}: {wrong:?}", case.name, case.expected);
    }
}

#[test]
fn a_failing_computation_fails_the_case() {
    let mut case = cases().remove(0);
    case.compute = || Err("deliberately broken".into());
    let outcome = case.check();
    assert!(!outcome.passed && outcome.computed.is_none());
    assert_eq!(outcome.error.as_deref(), Some("deliberately broken"));
}
