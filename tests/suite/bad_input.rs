//! The bad-input catalog: malformed doses files and flags, each run through the real binary.
//!
//! Every case must end with exit code 2, a message that names the file (with `line N` where
//! the problem is on a line) or the flag, says what was expected, shows no panic or backtrace,
//! writes no output file (`-o` is always given) and leaves the input untouched. Doses-file
//! cases are also run through `cistern check`, which must locate the problem the same way.

use crate::common::entries;
use std::path::Path;
use std::process::Command;

/// One malformed input.
struct Case {
    /// What is wrong, for the failure message.
    what: &'static str,
    /// Bytes written to `doses.csv` in the run's directory, when the case has a file.
    file: Option<&'static [u8]>,
    /// The command line; `-o out.csv` is appended unless the case gives its own `-o`.
    args: Vec<String>,
    /// Text the message must start with after `error: `: the file (`doses.csv: line 3`), the
    /// flag (`--every`), or the opening words of a message that names its flags inside.
    names: String,
    /// A phrase of the message saying what was expected.
    says: &'static str,
}

/// Simulating `doses.csv` with valid parameters, so the file is the only thing wrong.
const WITH_FILE: &str = "simulate --doses doses.csv --cl 4.2 --v 48 --times 0:24:1";

/// A doses file whose problem is on `line`, or on no line (`None`: the file as a whole).
fn file(what: &'static str, bytes: &'static [u8], line: Option<u64>, says: &'static str) -> Case {
    let names = match line {
        Some(n) => format!("doses.csv: line {n}"),
        None => format!("doses.csv: {says}"),
    };
    Case { file: Some(bytes), names, ..flags(what, WITH_FILE, "", says) }
}

/// A command line whose problem is the value of `flag`.
fn flags(what: &'static str, args: &str, flag: &'static str, says: &'static str) -> Case {
    let args = args.split_whitespace().map(String::from).collect();
    Case { what, file: None, args, names: flag.into(), says }
}

/// The same case run beside a `doses.csv` holding `bytes`.
fn with_file(bytes: &'static [u8], case: Case) -> Case {
    Case { file: Some(bytes), ..case }
}

const GOOD: &[u8] = b"time_h,amount_mg,route,duration_h\n0,1000,infusion,1\n12,1000,infusion,1\n";
const SIM: &str = "simulate --cl 4.2 --v 48 --times 0:24:1";
const REG: &str = "--dose 1g --every 12h --count 3 --route infusion --duration 1h";

#[rustfmt::skip] // one case per line reads as a table
fn catalog() -> Vec<Case> {
    let sim = |rest: &str| format!("{SIM} {rest}");
    let exposure = |rest: &str| format!("exposure {rest}");
    vec![
        // The file as a whole.
        file("empty file", b"", None, "the file is empty"),
        file("byte-order mark only", b"\xef\xbb\xbf", None, "the file is empty"),
        file("comments only", b"# invented\n# nothing else\n", None, "the file is empty"),
        file("header only", b"time_h,amount_mg,route\n", Some(1), "no data rows"),
        file("header only, after comments", b"# a\n\n# b\ntime_h,amount_mg,route\n", Some(4), "no data rows"),
        // The header.
        file("duplicate column", b"time_h,amount_mg,route,amount_mg\n0,1,bolus,1\n", Some(1), "duplicate column 'amount_mg'"),
        file("duplicate column after a comment", b"# x\ntime_h,route,time_h,amount_mg\n0,bolus,0,1\n", Some(2), "duplicate column 'time_h'"),
        file("one quantity in two units", b"time_h,time_min,amount_mg,route\n0,0,1,bolus\n", Some(1), "both give the time"),
        file("unknown unit amount_kg", b"time_h,amount_kg,route\n0,1,bolus\n", Some(1), "unknown amount unit 'kg'"),
        file("amount without a unit", b"time_h,amount,route\n0,1,bolus\n", Some(1), "has no unit"),
        file("unknown time unit", b"time_fortnight,amount_mg,route\n0,1,bolus\n", Some(1), "unknown time unit 'fortnight'"),
        file("missing route column", b"time_h,amount_mg\n0,1\n", Some(1), "missing the route column"),
        file("missing time column", b"amount_mg,route\n1,bolus\n", Some(1), "missing the dose time column"),
        file("column without a name", b"time_h,amount_mg,route,\n0,1,bolus,\n", Some(1), "column 4 has no name"),
        file("count without every", b"time_h,amount_mg,route,count\n0,1,bolus,3\n", Some(1), "go together"),
        // The rows.
        file("unknown route", b"time_h,amount_mg,route\n0,1,bolus\n12,1,iv\n", Some(3), "expected a route (bolus, infusion or oral), found 'iv'"),
        file("infusion without duration", b"time_h,amount_mg,route,duration_h\n0,1,infusion,\n", Some(2), "an infusion needs its duration"),
        file("infusion with no duration column", b"time_h,amount_mg,route\n0,1,bolus\n1,1,infusion\n", Some(3), "an infusion needs its duration"),
        file("negative infusion duration", b"time_h,amount_mg,route,duration_h\n0,1,infusion,-1\n", Some(2), "positive duration, found -1 h"),
        file("duration on a bolus", b"time_h,amount_mg,route,duration_h\n0,1,bolus,1\n", Some(2), "only meaningful for an infusion"),
        file("negative amount", b"time_h,amount_mg,route\n0,-250,bolus\n", Some(2), "non-negative"),
        file("non-numeric time", b"time_h,amount_mg,route\nnoon,1,bolus\n", Some(2), "expected a number, found 'noon'"),
        file("empty time", b"time_h,amount_mg,route\n,1,bolus\n", Some(2), "expected a number, found an empty field"),
        file("NaN time", b"time_h,amount_mg,route\nNaN,1,bolus\n", Some(2), "found 'NaN'"),
        file("infinite amount", b"time_h,amount_mg,route\n0,inf,bolus\n", Some(2), "found 'inf'"),
        file("amount overflowing to infinity", b"time_h,amount_mg,route\n0,1e400,bolus\n", Some(2), "found '1e400'"),
        file("time overflowing once converted", b"time_d,amount_mg,route\n1e307,1,bolus\n", Some(2), "'1e307', out of range once converted"),
        file("unit inside the field", b"time_h,amount_mg,route\n0,1g,bolus\n", Some(2), "found '1g'"),
        file("too many fields", b"time_h,amount_mg,route\n0,1,bolus\n1,1,bolus,left arm\n", Some(3), "expected 3 fields as in the header, found 4"),
        file("too few fields", b"time_h,amount_mg,route\n0,1\n", Some(2), "expected 3 fields as in the header, found 2"),
        file("non-UTF-8 bytes in a row", b"time_h,amount_mg,route\n0,1,bolus\n1,\xff\xfe,bolus\n", Some(3), "not valid UTF-8"),
        file("non-UTF-8 bytes in the header", b"time_h,amount_\xe9g,route\n0,1,bolus\n", Some(1), "not valid UTF-8"),
        file("count 0", b"time_h,amount_mg,route,every_h,count\n0,1,bolus,12,0\n", Some(2), "whole number of doses from 1 to 1000000, found '0'"),
        file("huge count", b"time_h,amount_mg,route,every_h,count\n0,1,bolus,12,1000000000000\n", Some(2), "from 1 to 1000000"),
        file("fractional count", b"time_h,amount_mg,route,every_h,count\n0,1,bolus,12,2.5\n", Some(2), "found '2.5'"),
        file("count without every in the row", b"time_h,amount_mg,route,every_h,count\n0,1,bolus,12,2\n24,1,bolus,,3\n", Some(3), "needs a dosing interval"),
        file("every without count in the row", b"time_h,amount_mg,route,every_h,count\n0,1,bolus,12,\n", Some(2), "needs a count"),
        file("every 0", b"time_h,amount_mg,route,every_h,count\n0,1,bolus,0,3\n", Some(2), "positive dosing interval"),
        file("empty subject", b"subject,time_h,amount_mg,route\na,0,1,bolus\n,0,1,bolus\n", Some(3), "expected a subject identifier"),
        // Line numbers that must survive what the reader skips or joins.
        file("comments and blank lines before the error", b"# invented\n\ntime_h,amount_mg,route\n# a note\n0,1,bolus\n\n# x\n1,x,bolus\n", Some(8), "found 'x'"),
        file("CRLF file, error on line 4", b"time_h,amount_mg,route\r\n0,1,bolus\r\n\r\n12,1,drip\r\n", Some(4), "found 'drip'"),
        file("BOM file, error on line 3", b"\xef\xbb\xbftime_h,amount_mg,route\n0,1,bolus\n12,-1,bolus\n", Some(3), "non-negative"),
        file("lone-CR file, error after a comment", b"time_h,amount_mg,route\r0,1,bolus\r# c\r12,1,drip\r", Some(4), "found 'drip'"),
        file("quoted field over two lines, then an error", b"subject,time_h,amount_mg,route\n\"ward 3\nbed 2\",0,1,bolus\nb,x,1,bolus\n", Some(4), "found 'x'"),
        file("unclosed quote swallowing a row", b"time_h,amount_mg,route\n0,1,\"bolus\n1,1,bolus\n", Some(2), "expected a route"),
        // Flags.
        flags("unknown amount unit", &sim("--dose 1kg --every 12h --count 3 --route bolus"), "--dose", "unknown amount unit 'kg'"),
        flags("amount that is not a number", &sim("--dose lots --every 12h --count 3 --route bolus"), "--dose", "expected a number"),
        flags("zero interval", &sim("--dose 1g --every 0h --count 3 --route bolus"), "--every", "must be positive"),
        flags("negative interval", &sim("--dose 1g --every -5h --count 3 --route bolus"), "--every", "must be positive, found -5 h"),
        flags("count 0", &sim("--dose 1g --every 12h --count 0 --route bolus"), "--count", "at least 1"),
        flags("negative count", &sim("--dose 1g --every 12h --count -3 --route bolus"), "invalid value '-3' for '--count", ""),
        flags("unknown route", &sim("--dose 1g --every 12h --count 3 --route nasal"), "--route", "found 'nasal'"),
        flags("infusion without duration", &sim("--dose 1g --every 12h --count 3 --route infusion"), "--duration", "needs its duration"),
        flags("duration on a bolus", &sim("--dose 1g --every 12h --count 3 --route bolus --duration 1h"), "--duration", "only meaningful for an infusion"),
        flags("clearance not a number", &format!("simulate {REG} --cl x --v 48 --at 1"), "--cl", "expected a number with an optional clearance unit"),
        flags("clearance in a volume unit", &format!("simulate {REG} --cl 4l --v 48 --at 1"), "--cl", "unknown clearance unit 'l'"),
        flags("negative clearance", &format!("simulate {REG} --cl -4.2 --v 48 --at 1"), "--cl", "clearance must be positive"),
        flags("negative rate constant", &format!("simulate {REG} --k -0.1/h --v 48 --at 1"), "--k", "must be positive"),
        flags("missing volume", &format!("simulate {REG} --cl 4.2 --at 1"), "--v", "volume of distribution is required"),
        flags("zero volume", &format!("simulate {REG} --cl 4.2 --v 0 --at 1"), "--v", "volume must be positive"),
        flags("neither clearance nor rate constant", &format!("simulate {REG} --v 48 --at 1"), "--cl", "give the clearance"),
        flags("both clearance and rate constant", &format!("simulate {REG} --cl 4.2 --k 0.1 --v 48 --at 1"), "the argument '--cl <CL>' cannot be used with '--k <K>'", ""),
        flags("bioavailability above 1", &sim("--dose 1g --every 12h --count 3 --route oral --ka 1.1 --f 1.5"), "--f", "bioavailability F must be in (0, 1]"),
        flags("bioavailability not a number", &sim("--dose 1g --every 12h --count 3 --route oral --ka 1.1 --f most"), "--f", "expected a number, found 'most'"),
        flags("negative lag time", &sim("--dose 1g --every 12h --count 3 --route oral --ka 1.1 --tlag -20min"), "--tlag", "non-negative"),
        flags("zero absorption rate", &sim("--dose 1g --every 12h --count 3 --route oral --ka 0"), "--ka", "ka must be positive"),
        flags("oral doses without ka", &sim("--dose 1g --every 12h --count 3 --route oral"), "--ka", "oral doses need an absorption rate constant"),
        with_file(b"time_h,amount_mg,route\n0,500,oral\n", flags("oral doses in a file without ka", WITH_FILE, "--ka", "oral doses need an absorption rate constant")),
        flags("grid ending before it starts", &format!("simulate {REG} --cl 4.2 --v 48 --times 10:0:1"), "--times", "END (0 h) is before START (10 h)"),
        flags("grid with zero step", &format!("simulate {REG} --cl 4.2 --v 48 --times 0:10:0"), "--times", "STEP must be positive"),
        flags("grid with negative step", &format!("simulate {REG} --cl 4.2 --v 48 --times 0:10:-1"), "--times", "STEP must be positive"),
        flags("grid without a step", &format!("simulate {REG} --cl 4.2 --v 48 --times 0:10"), "--times", "expected START:END:STEP"),
        flags("grid with a bad unit", &format!("simulate {REG} --cl 4.2 --v 48 --times 0:10h:1kg"), "--times", "unknown time unit 'kg'"),
        flags("grid too large", &format!("simulate {REG} --cl 4.2 --v 48 --times 0:1e5:0.001"), "--times", "ask for fewer time points"),
        flags("time list with a bad value", &format!("simulate {REG} --cl 4.2 --v 48 --at 1,soon,3"), "--at", "found 'soon'"),
        flags("time list with an empty value", &format!("simulate {REG} --cl 4.2 --v 48 --at 1,,3"), "--at", "found ''"),
        flags("time overflowing once converted", &format!("simulate {REG} --cl 4.2 --v 48 --at 1,1e307d"), "--at", "'1e307d' is out of range once converted to h"),
        flags("time list with NaN", &format!("simulate {REG} --cl 4.2 --v 48 --at NaN"), "--at", "found 'NaN'"),
        flags("several doses without an interval", "simulate --dose 1g --count 3 --route bolus --cl 4.2 --v 48", "--every", "3 doses need the dosing interval"),
        flags("both a grid and a time list", &format!("simulate {REG} --cl 4.2 --v 48 --times 0:1:1 --at 1"), "the argument '--times <GRID>' cannot be used with '--at <LIST>'", ""),
        with_file(GOOD, flags("both a doses file and a dose", &format!("{SIM} --doses doses.csv --dose 1g"), "--doses", "not both")),
        flags("missing doses file", &sim("--doses missing.csv"), "missing.csv", "cannot read the file"),
        flags("steady-state infusion longer than the interval", &exposure("--dose 1g --every 12h --duration 13h --cl 4.2 --v 48"), "--duration", "longer than the dosing interval"),
        flags("exposure without a dose", &exposure("--every 12h --duration 1h --cl 4.2 --v 48"), "--dose", "dose amount is required"),
        flags("exposure with oral doses and no ka", &exposure("--dose 1g --every 12h --route oral --cl 4.2 --v 48"), "--ka", "absorption rate constant"),
        with_file(GOOD, flags("-o onto the input file", &format!("{SIM} --doses doses.csv -o doses.csv"), "-o", "refusing to write the output over the input file 'doses.csv'")),
        with_file(GOOD, flags("-o onto the input by another path", &format!("{SIM} --doses doses.csv -o ./doses.csv"), "-o", "refusing to write the output over the input file 'doses.csv'")),
    ]
}

/// Run `args` in `dir` and return every way the run broke the contract.
fn violations(case: &Case, dir: &Path, args: &[&str], names: &str) -> Vec<String> {
    let out = Command::new(env!("CARGO_BIN_EXE_cistern")).args(args).current_dir(dir).output().unwrap();
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
            .and_then(|m| m.strip_prefix(names))
            .is_some_and(|rest| !rest.starts_with(|c: char| c.is_ascii_digit()))
    });
    match located {
        None => wrong.push(format!("no message starting 'error: {names}'")),
        Some(line) if !line.contains(case.says) => {
            wrong.push(format!("the message does not say '{}'", case.says))
        }
        Some(_) => {}
    }
    let expected: Vec<String> = case.file.map(|_| "doses.csv".to_string()).into_iter().collect();
    if entries(dir) != expected {
        wrong.push(format!("files left behind: {:?}", entries(dir)));
    }
    if let Some(bytes) = case.file
        && std::fs::read(dir.join("doses.csv")).unwrap() != bytes
    {
        wrong.push("the input file was changed".into());
    }
    if !wrong.is_empty() {
        wrong.push(format!("cistern {}\n{stderr}", args.join(" ")));
    }
    wrong
}

#[test]
fn every_malformed_input_is_refused_with_a_located_message() {
    let cases = catalog();
    assert!(cases.len() >= 30);
    let mut failures = Vec::new();
    for case in &cases {
        let dir = tempfile::tempdir().unwrap();
        if let Some(bytes) = case.file {
            std::fs::write(dir.path().join("doses.csv"), bytes).unwrap();
        }
        let mut args: Vec<&str> = case.args.iter().map(String::as_str).collect();
        if !args.contains(&"-o") {
            args.extend(["-o", "out.csv"]);
        }
        let mut wrong = violations(case, dir.path(), &args, &case.names);
        // A broken doses file is located the same way by `check`.
        if case.names.starts_with("doses.csv") {
            wrong.extend(violations(case, dir.path(), &["check", "doses.csv"], &case.names));
        }
        if !wrong.is_empty() {
            failures.push(format!("{}:\n  {}", case.what, wrong.join("\n  ")));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases broke the contract:\n\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}
