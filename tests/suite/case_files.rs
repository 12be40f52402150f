//! Case files (`--case FILE`, and the argument of `cistern report`) as the real binary reads
//! them, in temporary copies of the invented demo scenario (`demo-regimens/`).
//!
//! The bad-input catalog: every broken case ends with exit code 2, one message that names the
//! case file and the key (with its line, when the problem is one value) or the missing path,
//! no message naming a flag that was not given, and no output — no file and no temporary file
//! — in the output directory. Then: flags override the case, and the paths in a case are
//! relative to the case file, not to the working directory.

use crate::common::{Ran, cistern_at, demo_copy, entries, page_texts, squeeze};
use serde_json::Value;
use std::path::Path;

const EPOCH: &str = "1740837909";

fn demo_case() -> String {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-regimens/p01.toml");
    std::fs::read_to_string(path).expect("the demo case")
}

fn run(dir: &Path, args: &[&str]) -> Ran {
    cistern_at(dir, args, EPOCH)
}

fn ok(dir: &Path, args: &[&str]) -> Ran {
    let ran = run(dir, args);
    assert_eq!(ran.code, 0, "cistern {args:?} failed:\n{}", ran.stderr);
    ran
}

fn json(dir: &Path, args: &[&str]) -> Value {
    serde_json::from_str(&ok(dir, args).stdout).expect("JSON on stdout")
}

/// The commands that read a case.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Cmd {
    Report,
    Plan,
    Fit,
    Sweep,
}
use Cmd::{Fit, Plan, Report, Sweep};

const ALL: &[Cmd] = &[Report, Plan, Fit, Sweep];
/// The commands that read the targets, limits and candidates.
const GRID: &[Cmd] = &[Report, Plan, Sweep];
/// The commands that need the candidates stated: `plan` and `report` derive those not given
/// (issue 10).
const STATED_CANDIDATES: &[Cmd] = &[Sweep];

impl Cmd {
    /// The command line for `case`, writing into the working directory.
    fn args(self, case: &str) -> Vec<&str> {
        match self {
            Report => vec!["report", case, "-o", "out.pdf"],
            Plan => vec!["plan", "--case", case, "--format", "json", "-o", "out.json"],
            Fit => vec!["fit", "--case", case, "--format", "json", "-o", "out.json"],
            Sweep => vec!["sweep", "--case", case, "--format", "json", "-o", "out.json"],
        }
    }
}

/// One broken case file.
struct Bad {
    what: &'static str,
    /// The text of `bad.toml`.
    text: String,
    /// The commands it is run through, and the phrases one message of theirs must all hold.
    checks: Vec<(&'static [Cmd], Vec<String>)>,
}

/// The demo case with `edits` made, each `(start of a line, its replacement or None to drop
/// it)`; `{line}` in the phrases stands for the line of the first edit.
fn bad(what: &'static str, edits: &[(&str, Option<&str>)], checks: &[(&'static [Cmd], &[&str])]) -> Bad {
    let mut lines: Vec<String> = demo_case().lines().map(str::to_string).collect();
    let mut first = None;
    for (start, to) in edits {
        let at: Vec<usize> = (0..lines.len()).filter(|&i| lines[i].starts_with(start)).collect();
        assert_eq!(at.len(), 1, "{what}: '{start}' starts {} lines of the demo case", at.len());
        first.get_or_insert(at[0] + 1);
        match to {
            Some(to) => lines[at[0]] = to.to_string(),
            None => {
                lines.remove(at[0]);
            }
        }
    }
    let line = first.expect("at least one edit").to_string();
    Bad {
        what,
        text: lines.join("\n") + "\n",
        checks: checks
            .iter()
            .map(|(cmds, says)| (*cmds, says.iter().map(|s| s.replace("{line}", &line)).collect()))
            .collect(),
    }
}

#[rustfmt::skip] // one case per line reads as a table
fn catalog() -> Vec<Bad> {
    let appended = Bad {
        what: "unknown table",
        text: demo_case() + "\n[plot]\nwidth = 3\n",
        checks: vec![(ALL, vec![format!("bad.toml: line {}", demo_case().lines().count() + 2), "`plot`".into()])],
    };
    vec![
        // Files the case names that are not there: the key and the path.
        bad("missing levels file", &[("levels = ", Some("levels = \"no-such-levels.csv\""))], &[(ALL, &["bad.toml: line {line}, key inputs.levels", "no-such-levels.csv"])]),
        bad("missing model file", &[("model = ", Some("model = \"models/none.toml\""))], &[(ALL, &["bad.toml: line {line}, key inputs.model", "none.toml"])]),
        bad("missing doses file", &[("doses = ", Some("doses = \"dose.csv\""))], &[(ALL, &["bad.toml: line {line}, key inputs.doses", "dose.csv"])]),
        bad("missing covariate pool", &[("covariates = \"population", Some("covariates = \"pool.csv\""))], &[(ALL, &["bad.toml: line {line}, key sweep.covariates", "pool.csv"])]),
        // Keys the format does not have: the key and its line.
        bad("unknown key in [plan]", &[("amounts = ", Some("amount = \"500..2500/250\""))], &[(ALL, &["bad.toml: line {line}, key plan", "`amount`"])]),
        bad("unknown key in [limits]", &[("max_peak = ", Some("max_peek = \"60mg/l\""))], &[(ALL, &["bad.toml: line {line}, key limits", "`max_peek`"])]),
        appended,
        bad("TOML syntax error", &[("[limits]", Some("[limits"))], &[(ALL, &["bad.toml: line {line}"])]),
        // Doses are optional (a new patient, issue 10), but the levels need them.
        bad("levels without a doses key", &[("doses = ", None)], &[(&[Report, Plan, Fit], &["bad.toml: key inputs.doses", "doses file is required"])]),
        // Values that do not parse: the key and its line.
        bad("target bounds reversed", &[("targets = ", Some("targets = [\"auc24=600..400\", \"trough=..15\"]"))], &[(ALL, &["bad.toml: line {line}, key plan.targets", "600..400"])]),
        bad("unknown target metric", &[("targets = ", Some("targets = [\"auc25=400..600\"]"))], &[(ALL, &["bad.toml: line {line}, key plan.targets", "auc25"])]),
        bad("targets not a list", &[("targets = ", Some("targets = \"auc24=400..600\""))], &[(ALL, &["bad.toml: line {line}, key plan.targets"])]),
        bad("amounts not a number", &[("amounts = ", Some("amounts = \"lots\""))], &[(ALL, &["bad.toml: line {line}, key plan.amounts", "'lots'"])]),
        bad("negative interval", &[("every = ", Some("every = \"8h,-12h\""))], &[(ALL, &["bad.toml: line {line}, key plan.every", "-12h"])]),
        bad("unknown route", &[("route = ", Some("route = \"nasal\""))], &[(ALL, &["bad.toml: line {line}, key plan.route", "nasal"])]),
        bad("limit not a number", &[("max_peak = ", Some("max_peak = \"sixty\""))], &[(ALL, &["bad.toml: line {line}, key limits.max_peak", "'sixty'"])]),
        bad("limit without quotes", &[("max_peak = ", Some("max_peak = 60"))], &[(ALL, &["bad.toml: line {line}, key limits.max_peak"])]),
        bad("limit in the wrong unit", &[("max_dose = ", Some("max_dose = \"2.5h\""))], &[(ALL, &["bad.toml: line {line}, key limits.max_dose", "2.5h"])]),
        bad("risk above 1", &[("max_risk = ", Some("max_risk = 1.5"))], &[(ALL, &["bad.toml: line {line}, key limits.max_risk"])]),
        bad("risk as text", &[("max_risk = ", Some("max_risk = \"0.1\""))], &[(ALL, &["bad.toml: line {line}, key limits.max_risk"])]),
        bad("too few draws", &[("draws = ", Some("draws = 5"))], &[(ALL, &["bad.toml: line {line}, key fit.draws"])]),
        bad("seed as text", &[("seed = ", Some("seed = \"seven\""))], &[(ALL, &["bad.toml: line {line}, key case.seed"])]),
        bad("no virtual subjects", &[("subjects = ", Some("subjects = 0"))], &[(ALL, &["bad.toml: line {line}, key sweep.subjects"])]),
        // Options that contradict each other or leave the grid incomplete: the case and the key.
        bad("oral route with infusion durations", &[("route = ", Some("route = \"oral\""))], &[(GRID, &["bad.toml: key plan.durations", "infusion"])]),
        bad("max trough above max peak", &[("max_trough = ", Some("max_trough = \"70mg/l\""))], &[(GRID, &["bad.toml: key limits", "70 mg/L"])]),
        bad("target trough above max trough", &[("targets = ", Some("targets = [\"auc24=400..600\", \"trough=25..30\"]"))], &[(GRID, &["bad.toml: key plan.targets", "trough=25..30"])]),
        bad("infusions with neither durations nor a rate limit", &[("durations = ", None), ("max_rate = ", None)], &[(STATED_CANDIDATES, &["bad.toml: key plan.durations"])]),
        bad("no amounts", &[("amounts = ", None)], &[(STATED_CANDIDATES, &["bad.toml: key plan.amounts"])]),
        bad("no targets", &[("targets = ", None)], &[(GRID, &["bad.toml: key plan.targets"])]),
        // The data do not hold what the case asks for.
        bad("subject not in the data", &[("subject = ", Some("subject = \"P99\""))], &[(&[Report], &["bad.toml: line {line}, key case.subject", "'P99'"]), (&[Plan], &["'P99'"])]),
        bad("several subjects, none named", &[("subject = ", None)], &[(&[Report], &["bad.toml: ", "3 subjects", "case.subject"]), (&[Plan], &["3 subjects", "case.subject"])]),
        bad("no model", &[("model = ", None)], &[(&[Report, Plan, Sweep], &["bad.toml: key inputs.model"])]),
        // Without levels `plan` and `report` plan a priori (issue 10); `fit` needs them.
        bad("no levels", &[("levels = ", None)], &[(&[Fit], &["bad.toml: key inputs.levels"])]),
    ]
}

/// Every way `cmd` on the case broke the contract.
fn violations(case: &Bad, cmd: Cmd, says: &[String]) -> Vec<String> {
    let dir = demo_copy();
    std::fs::write(dir.path().join("bad.toml"), &case.text).unwrap();
    let before = entries(dir.path());
    let ran = run(dir.path(), &cmd.args("bad.toml"));
    let mut wrong = Vec::new();
    if ran.code != 2 {
        wrong.push(format!("exit code {}, expected 2", ran.code));
    }
    if ran.stderr.contains("panicked") {
        wrong.push("a panic".into());
    }
    let errors: Vec<&str> = ran.stderr.lines().filter_map(|l| l.strip_prefix("error: ")).collect();
    if !errors.iter().any(|e| says.iter().all(|s| e.contains(s.as_str()))) {
        wrong.push(format!("no message with all of {says:?}"));
    }
    // Only the case was given: no message may send the user to a flag for what it holds.
    for e in errors.iter().filter(|e| e.starts_with("--")) {
        wrong.push(format!("a message names a flag that was not given: {e}"));
    }
    let after = entries(dir.path());
    if after != before {
        wrong.push(format!(
            "files left behind: {:?}",
            after.iter().filter(|f| !before.contains(f)).collect::<Vec<_>>()
        ));
    }
    if !wrong.is_empty() {
        wrong.push(format!("stderr:\n{}", ran.stderr));
    }
    wrong
}

#[test]
fn the_demo_case_runs_through_every_command() {
    // Without this, every case below could fail for a reason other than its own.
    let dir = demo_copy();
    std::fs::write(dir.path().join("bad.toml"), demo_case()).unwrap();
    for cmd in ALL {
        ok(dir.path(), &cmd.args("bad.toml"));
    }
    assert!(dir.path().join("out.pdf").is_file() && dir.path().join("out.json").is_file());
}

#[test]
fn broken_case_files_exit_2_name_the_key_or_path_and_leave_nothing() {
    let cases = catalog();
    let mut failures = Vec::new();
    let mut runs = 0;
    for case in &cases {
        for (cmds, says) in &case.checks {
            for &cmd in *cmds {
                runs += 1;
                let wrong = violations(case, cmd, says);
                if !wrong.is_empty() {
                    failures.push(format!("{} ({cmd:?}):\n  {}", case.what, wrong.join("\n  ")));
                }
            }
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {runs} runs broke the contract:\n\n{}",
        failures.len(),
        failures.join("\n\n")
    );
}

#[test]
fn the_report_never_writes_over_its_inputs_or_leaves_a_partial_pdf() {
    let dir = demo_copy();
    let before = entries(dir.path());
    let levels = std::fs::read(dir.path().join("levels.csv")).unwrap();
    // An input the case names, and the case itself.
    for target in ["levels.csv", "p01.toml"] {
        let ran = run(dir.path(), &["report", "p01.toml", "-o", target]);
        assert_eq!(ran.code, 2, "-o {target}: {}", ran.stderr);
        assert!(ran.stderr.contains("refusing to write"), "{}", ran.stderr);
    }
    let ran = run(dir.path(), &["report", "p01.toml", "--svg", "curve.svg", "-o", "model.toml"]);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    // The SVG cannot be created: the PDF, opened first, is not left behind either.
    let ran = run(dir.path(), &["report", "p01.toml", "-o", "out.pdf", "--svg", "no/such/dir/curve.svg"]);
    assert_ne!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stderr.contains("no/such/dir/curve.svg"), "{}", ran.stderr);
    assert_eq!(entries(dir.path()), before);
    assert_eq!(std::fs::read(dir.path().join("levels.csv")).unwrap(), levels);
}

/// The demo case written out as flags (paths relative to the demo directory), as pairs.
#[rustfmt::skip]
const CASE_AS_FLAGS: &[(&str, &str)] = &[
    ("--model", "model.toml"), ("--doses", "doses.csv"), ("--levels", "levels.csv"),
    ("--covariates", "covariates.csv"), ("--subject", "P01"), ("--seed", "7"), ("--draws", "2000"),
    ("--target", "auc24=400..600"), ("--target", "trough=..15"), ("--amounts", "500..2500/250"),
    ("--every", "8h,12h,24h,36h"), ("--route", "infusion"), ("--durations", "1h,2h"),
    ("--max-dose", "2.5g"), ("--max-daily", "4g"), ("--max-rate", "25mg/min"), ("--max-peak", "60mg/l"),
    ("--max-trough", "20mg/l"), ("--max-risk", "0.1"),
];

/// `cistern plan` with the demo case given as flags, the flags in `changed` taking new values.
fn plan_with_flags(dir: &Path, changed: &[(&str, &str)]) -> Value {
    let mut args = vec!["plan", "--format", "json"];
    for (flag, value) in CASE_AS_FLAGS {
        let value = changed.iter().find(|(f, _)| f == flag).map_or(*value, |(_, v)| *v);
        args.extend([*flag, value]);
    }
    json(dir, &args)
}

#[test]
fn flags_override_the_case() {
    let dir = demo_copy();
    let d = dir.path();
    let case = json(d, &["plan", "--case", "p01.toml", "--format", "json"]);
    assert_eq!(case, plan_with_flags(d, &[]), "the case is its flags");

    // --subject: the plan is P02's, exactly as with every setting given as a flag.
    let p02 = json(d, &["plan", "--case", "p01.toml", "--subject", "P02", "--format", "json"]);
    assert_eq!(p02["subject"], "P02");
    assert_eq!(p02, plan_with_flags(d, &[("--subject", "P02")]));
    assert_ne!(p02["recommended"], case["recommended"], "P02's plan is not P01's");

    // --amounts and --max-peak replace the case's; every other setting stays the case's.
    let one = json(
        d,
        &["plan", "--case", "p01.toml", "--amounts", "1g", "--max-peak", "40mg/l", "--format", "json"],
    );
    let amounts: Vec<f64> =
        one["candidates"].as_array().unwrap().iter().map(|c| c["amount_mg"].as_f64().unwrap()).collect();
    // 4 intervals × 2 durations of the case, one amount.
    assert_eq!(amounts.len(), 8, "{amounts:?}");
    assert!(amounts.iter().all(|a| (a - 1000.0).abs() < 1e-9), "{amounts:?}");
    assert_eq!(one["limits"]["max_peak_mg_l"].as_f64(), Some(40.0));
    for key in ["max_dose_mg", "max_daily_mg", "max_rate_mg_h", "max_trough_mg_l", "max_risk"] {
        assert_eq!(one["limits"][key], case["limits"][key], "{key}");
    }
    assert_eq!(one["targets"], case["targets"]);
    assert_eq!(one, plan_with_flags(d, &[("--amounts", "1g"), ("--max-peak", "40mg/l")]));

    // A file flag: relative to the working directory, and replacing the case's file.
    let shifted: String =
        std::fs::read_to_string(d.join("levels.csv")).unwrap().replace("P01,61.0,22.1", "P01,61.0,18.4");
    std::fs::write(d.join("other-levels.csv"), shifted).unwrap();
    let other = json(d, &["plan", "--case", "p01.toml", "--levels", "other-levels.csv", "--format", "json"]);
    assert_eq!(other, plan_with_flags(d, &[("--levels", "other-levels.csv")]));
    assert_ne!(other["candidates"], case["candidates"], "the other levels changed nothing");

    // The report takes --subject too.
    ok(d, &["report", "p01.toml", "--subject", "P02", "-o", "p02.pdf"]);
    let first = squeeze(&page_texts(&std::fs::read(d.join("p02.pdf")).unwrap())[0]);
    assert!(first.contains("SubjectP02") && !first.contains("SubjectP01"), "{first}");
}

#[test]
fn paths_in_a_case_are_relative_to_the_case_file() {
    let root = tempfile::tempdir().unwrap();
    let demo = root.path().join("cases").join("demo");
    std::fs::create_dir_all(&demo).unwrap();
    let copy = demo_copy();
    for name in entries(copy.path()) {
        std::fs::copy(copy.path().join(&name), demo.join(&name)).unwrap();
    }
    // Decoys with the case's file names in the working directory: read by mistake, they fail.
    let elsewhere = root.path().join("elsewhere");
    std::fs::create_dir(&elsewhere).unwrap();
    for name in ["model.toml", "doses.csv", "levels.csv", "covariates.csv", "population.csv"] {
        std::fs::write(elsewhere.join(name), "decoy: not the case's file\n").unwrap();
    }
    let case = "../cases/demo/p01.toml";
    let absolute = demo.join("p01.toml").to_string_lossy().into_owned();
    let here = json(&demo, &["plan", "--case", "p01.toml", "--format", "json"]);
    assert_eq!(json(&elsewhere, &["plan", "--case", case, "--format", "json"]), here);
    assert_eq!(json(&elsewhere, &["plan", "--case", &absolute, "--format", "json"]), here);
    assert_eq!(
        json(&elsewhere, &["sweep", "--case", case, "--format", "json"]),
        json(&demo, &["sweep", "--case", "p01.toml", "--format", "json"])
    );
    let fit = json(&elsewhere, &["fit", "--case", case, "--format", "json"]);
    assert_eq!(fit["subjects"].as_array().map(Vec::len), Some(3), "the case's three subjects");

    // `report CASE` without -o writes <case name>-report.pdf into the working directory.
    let listed = entries(&demo);
    ok(&elsewhere, &["report", case]);
    assert!(elsewhere.join("p01-report.pdf").is_file(), "{:?}", entries(&elsewhere));
    assert_eq!(entries(&demo), listed, "nothing written beside the case");
    let text = squeeze(&page_texts(&std::fs::read(elsewhere.join("p01-report.pdf")).unwrap()).concat());
    assert!(text.contains(&squeeze("../cases/demo/levels.csv")), "the digests name the files read");
}

#[test]
fn a_problem_with_a_flag_given_over_a_case_names_the_flag() {
    let dir = demo_copy();
    for (flag, value, names) in [
        ("--target", "trough=25..30", "error: --target: "),
        ("--max-peak", "10mg/l", "error: --max-peak: "),
        ("--amounts", "lots", "error: --amounts: "),
    ] {
        for cmd in ["plan", "sweep"] {
            let ran = run(dir.path(), &[cmd, "--case", "p01.toml", flag, value, "--format", "json"]);
            assert_eq!(ran.code, 2, "{cmd} {flag} {value}: {}", ran.stderr);
            assert!(ran.stderr.lines().any(|l| l.starts_with(names)), "{cmd} {flag} {value}: {}", ran.stderr);
            assert!(
                !ran.stderr.contains("p01.toml"),
                "{cmd} {flag} {value}: blamed the case: {}",
                ran.stderr
            );
        }
    }
}
