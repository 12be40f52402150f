//! Every command on random valid and invalid inputs, as real processes. Whatever the input, a
//! run must: exit with 0, 1 or 2 only (never a signal or an abort); never panic; never print
//! NaN or infinity as a number on stdout or in an output file; leave nothing in the output
//! directory when it refuses its input (exit 2), and never a temporary file; and end within a
//! wall-clock bound (no input may hang the tool).
//!
//! Each case takes one of the documented commands on the invented demo files and damages it
//! once: a flag's value replaced by a hostile token, a flag dropped, or a value in one of its
//! input files replaced.

use proptest::prelude::*;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// The longest any case may run. The cases are small (200 draws, 200 virtual subjects): a
/// healthy run takes well under a second in a release build; the bound only catches hangs.
const WALL_CLOCK: Duration = Duration::from_secs(60);

/// The commands, on the demo files, each writing into `out/`.
const COMMANDS: &[&str] = &[
    "simulate --dose 1g --route infusion --duration 1h --every 12h --count 6 --cl 4.2 --v 48 \
     --times 0:72h:30min -o out/sim.csv --svg out/sim.svg",
    "simulate --doses doses.csv --cl 70ml/min --v 48l --ka 1.1 --f 0.8 --at 1,6,11.5 --format json",
    "exposure --dose 1g --every 12h --route infusion --duration 1h --cl 4.2 --v 48 --format json \
     -o out/exposure.json",
    "exposure --dose 500mg --every 8h --route oral --ka 1.1 --f 0.8 --k 0.0875/h --v 48l --format csv",
    "fit --model model.toml --doses doses.csv --levels levels.csv --covariates covariates.csv \
     --draws 200 --format csv -o out/fit.csv",
    "fit --model model.toml --doses doses.csv --levels levels.csv --covariates covariates.csv \
     --method wls --format json",
    "plan --model model.toml --doses doses.csv --levels levels.csv --covariates covariates.csv \
     --subject P01 --target auc24=400..600 --target trough=..15 --amounts 500..2000/250 \
     --every 8h,12h,24h --durations 1h --max-dose 2g --draws 200 --format json -o out/plan.json",
    "sweep --case p01.toml --subjects 200 --format csv -o out/sweep.csv --per-subject out/rows.csv",
    "merge s1.json s2.json --format csv -o out/merged.csv",
    "nca --doses doses.csv --levels levels.csv --partial 0h..12h --lambda-z-window 1h..30h --format json \
     -o out/nca.json",
    "check doses.csv levels.csv model.toml covariates.csv",
    "verify --format csv -o out/verify.csv",
    "report p01.toml --draws 200 -o out/report.pdf --svg out/report.svg",
    "vpc --model model.toml --doses doses.csv --levels levels.csv --covariates covariates.csv \
     --replicates 100 --bins 0,4h,12h,48h --format csv -o out/vpc.csv --svg out/vpc.svg",
];

/// Values that break something: empty, signs, zero, extremes, non-finite spellings, garbage,
/// control characters, ranges with a side missing.
const HOSTILE: &[&str] = &[
    "",
    "0",
    "-1",
    "-0",
    "1e308",
    "1e-320",
    "1e160",
    "nan",
    "NaN",
    "inf",
    "-inf",
    "infinity",
    "abc",
    "1000000000",
    "2.5g",
    "12h",
    "0.5",
    "1..",
    "..",
    "1..0",
    "=5",
    "\u{1b}[2J",
    "P01\u{7}",
    "1e9mg",
    "0h",
    "99999999999999999999",
    "0:1000000h:1min",
    "0.0001min",
];

/// One damage to a command.
#[derive(Debug, Clone)]
enum Damage {
    /// Replace the value at this position among the command's values.
    Value(prop::sample::Index, &'static str),
    /// Drop the flag at this position (and its value, if it has one).
    Drop(prop::sample::Index),
    /// Replace a field of one line of one input file.
    File(prop::sample::Index, prop::sample::Index, prop::sample::Index, &'static str),
}

fn damage() -> impl Strategy<Value = Damage> {
    let hostile = prop::sample::select(HOSTILE);
    prop_oneof![
        (any::<prop::sample::Index>(), hostile.clone()).prop_map(|(i, t)| Damage::Value(i, t)),
        any::<prop::sample::Index>().prop_map(Damage::Drop),
        (any::<prop::sample::Index>(), any::<prop::sample::Index>(), any::<prop::sample::Index>(), hostile)
            .prop_map(|(f, l, c, t)| Damage::File(f, l, c, t)),
    ]
}

/// The input files a command line names (the demo files it reads).
fn inputs_of(args: &[String]) -> Vec<String> {
    args.iter()
        .filter(|a| [".csv", ".toml", ".json"].iter().any(|e| a.ends_with(e)) && !a.starts_with("out/"))
        .cloned()
        .collect()
}

/// Apply `damage` to `args` (and to the files in `dir`).
fn apply(dir: &Path, args: &mut Vec<String>, damage: &Damage) {
    match damage {
        Damage::Value(i, token) => {
            let values: Vec<usize> =
                (1..args.len()).filter(|&k| !args[k].starts_with('-') || args[k] == "-").collect();
            if !values.is_empty() {
                args[values[i.index(values.len())]] = (*token).to_string();
            }
        }
        Damage::Drop(i) => {
            let flags: Vec<usize> = (1..args.len()).filter(|&k| args[k].starts_with('-')).collect();
            if !flags.is_empty() {
                let k = flags[i.index(flags.len())];
                let with_value = args.get(k + 1).is_some_and(|v| !v.starts_with('-'));
                args.drain(k..k + 1 + usize::from(with_value));
            }
        }
        Damage::File(f, l, c, token) => {
            let files = inputs_of(args);
            if files.is_empty() {
                return;
            }
            let path = dir.join(&files[f.index(files.len())]);
            let Ok(text) = std::fs::read_to_string(&path) else { return };
            let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
            if lines.is_empty() {
                return;
            }
            let at = l.index(lines.len());
            let line = &mut lines[at];
            // A CSV field or a TOML value: whatever follows a comma or an equals sign.
            let separator = if path.extension().is_some_and(|e| e == "toml") { '=' } else { ',' };
            let mut parts: Vec<String> = line.split(separator).map(str::to_string).collect();
            let k = c.index(parts.len());
            // A subject named "nan" would print as itself, which is not a number: identifiers
            // get the other hostile tokens.
            let header = text.lines().find(|l| !l.starts_with('#')).unwrap_or("");
            let is_subject =
                separator == ',' && header.split(',').nth(k).is_some_and(|h| h.trim() == "subject");
            let token = if is_subject && non_finite_token(token).is_some() { "P99" } else { *token };
            parts[k] = if separator == '=' && k > 0 { format!(" {token}") } else { token.to_string() };
            *line = parts.join(&separator.to_string());
            std::fs::write(&path, lines.join("\n") + "\n").unwrap();
        }
    }
}

/// Words that print a non-finite number.
fn non_finite_token(text: &str) -> Option<String> {
    text.split(|c: char| !(c.is_ascii_alphanumeric() || "+-._".contains(c)))
        .map(|t| t.trim_matches(|c| c == '.' || c == '+' || c == '-'))
        .find(|t| ["nan", "inf", "infinity"].contains(&t.to_ascii_lowercase().as_str()))
        .map(str::to_string)
}

/// Run the binary with a wall-clock bound; `None` when it had to be killed.
fn run_bounded(dir: &Path, args: &[String]) -> Option<(Option<i32>, Vec<u8>, Vec<u8>)> {
    let mut child = Command::new(env!("CARGO_BIN_EXE_cistern"))
        .args(args)
        .current_dir(dir)
        .env("SOURCE_DATE_EPOCH", "1700000000")
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the cistern binary starts");
    // Drain both pipes on threads, so a large output cannot block the child.
    let mut stdout = child.stdout.take().unwrap();
    let mut stderr = child.stderr.take().unwrap();
    let out = std::thread::spawn(move || {
        let mut b = Vec::new();
        std::io::Read::read_to_end(&mut stdout, &mut b).ok();
        b
    });
    let err = std::thread::spawn(move || {
        let mut b = Vec::new();
        std::io::Read::read_to_end(&mut stderr, &mut b).ok();
        b
    });
    let start = Instant::now();
    loop {
        if let Some(status) = child.try_wait().unwrap() {
            return Some((status.code(), out.join().unwrap(), err.join().unwrap()));
        }
        if start.elapsed() > WALL_CLOCK {
            child.kill().ok();
            child.wait().ok();
            return None;
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// A scratch copy of the demo files with an empty output directory, and for `merge` two
/// sweep shard states.
fn scratch(command: &str) -> tempfile::TempDir {
    let dir = crate::common::demo_copy();
    let shards: &[&str] = if command.starts_with("merge") { &["1/2", "2/2"] } else { &[] };
    for shard in shards {
        let out = format!("s{}.json", &shard[..1]);
        let args: Vec<String> = format!("sweep --case p01.toml --subjects 200 --shard {shard} -o {out}")
            .split(' ')
            .map(str::to_string)
            .collect();
        let (code, _, err) = run_bounded(dir.path(), &args).expect("a shard runs");
        assert_eq!(code, Some(0), "a valid shard runs: {}", String::from_utf8_lossy(&err));
    }
    std::fs::create_dir(dir.path().join("out")).unwrap();
    dir
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, failure_persistence: None, ..ProptestConfig::default() })]

    #[test]
    fn every_command_ends_cleanly_on_damaged_input(which in 0..COMMANDS.len(), damage in damage()) {
        let dir = scratch(COMMANDS[which]);
        let mut args: Vec<String> = COMMANDS[which].split_whitespace().map(str::to_string).collect();
        apply(dir.path(), &mut args, &damage);
        let shown = format!("cistern {}", args.join(" "));

        let Some((code, stdout, stderr)) = run_bounded(dir.path(), &args) else {
            return Err(TestCaseError::fail(format!("{shown}: still running after {WALL_CLOCK:?}")));
        };
        let stderr = String::from_utf8_lossy(&stderr);
        prop_assert!(matches!(code, Some(0..=2)), "{shown}: exit {code:?}\n{stderr}");
        prop_assert!(!stderr.contains("panicked"), "{shown}: panicked\n{stderr}");

        let out_dir = dir.path().join("out");
        let written: Vec<std::path::PathBuf> =
            std::fs::read_dir(&out_dir).unwrap().map(|e| e.unwrap().path()).collect();
        for file in &written {
            let name = file.file_name().unwrap().to_string_lossy();
            prop_assert!(!name.starts_with('.'), "{shown}: left a temporary file {name}");
        }
        if code == Some(2) {
            prop_assert!(written.is_empty(), "{shown}: refused its input but wrote {written:?}");
            return Ok(());
        }
        let stdout = String::from_utf8_lossy(&stdout);
        if let Some(t) = non_finite_token(&stdout) {
            return Err(TestCaseError::fail(format!("{shown}: stdout prints '{t}'\n{stdout}")));
        }
        for file in written.iter().filter(|f| f.extension().is_none_or(|e| e != "pdf")) {
            let text = String::from_utf8_lossy(&std::fs::read(file).unwrap()).into_owned();
            if let Some(t) = non_finite_token(&text) {
                return Err(TestCaseError::fail(format!("{shown}: {} holds '{t}'", file.display())));
            }
        }
    }
}

#[test]
fn the_commands_run_cleanly_undamaged() {
    // The property above is only meaningful if every command works before it is damaged.
    for command in COMMANDS {
        let dir = scratch(command);
        let args: Vec<String> = command.split_whitespace().map(str::to_string).collect();
        let (code, stdout, stderr) = run_bounded(dir.path(), &args).expect("ends in time");
        assert_eq!(code, Some(0), "cistern {command}\n{}", String::from_utf8_lossy(&stderr));
        assert_eq!(non_finite_token(&String::from_utf8_lossy(&stdout)), None, "cistern {command}");
    }
}

#[test]
fn the_non_finite_detector_sees_what_it_must() {
    assert_eq!(non_finite_token("cmax_mg_l,NaN\n").as_deref(), Some("NaN"));
    assert_eq!(non_finite_token("\"auc\": inf,").as_deref(), Some("inf"));
    assert_eq!(non_finite_token("x = -inf").as_deref(), Some("inf"));
    assert_eq!(non_finite_token("route infusion, auc_inf_mg_h_l 12.5, information"), None);
}
