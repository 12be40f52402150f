//! ADPPK input and SDTM PP output (issue 15). The ADPPK files are R's Theoph data (exported to
//! tests/reference/population/theoph/ by theoph.R) written as ADPPK by the committed script
//! tests/reference/adppk/make_adppk.py: the same study as our doses, levels and covariates
//! files there, so every command must give the same results from either.

use crate::common::{Ran, assert_rel, ran};
use serde_json::Value;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn theoph() -> PathBuf {
    root().join("tests/reference/population/theoph")
}

fn adppk(name: &str) -> String {
    root().join("tests/reference/adppk").join(name).to_string_lossy().into_owned()
}

/// The map the Theoph ADPPK files need: AMT in mg, and the subjects under their SUBJID (S01,
/// as in our files) rather than USUBJID (THEOPH-S01).
const MAP: [&str; 4] = ["--map", "amount_mg=AMT", "--map", "subject=SUBJID"];

fn cistern(args: &[&str]) -> Ran {
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(args).arg("-q");
    ran(command)
}

/// `command` on our three files and on the ADPPK file `name`, each with `extra`.
fn both(command: &str, name: &str, extra: &[&str]) -> (Ran, Ran) {
    let dir = theoph();
    let file = |f: &str| dir.join(f).to_string_lossy().into_owned();
    let (doses, levels, covariates) = (file("doses.csv"), file("levels.csv"), file("covariates.csv"));
    let mut ours = vec![command, "--doses", &doses, "--levels", &levels];
    if command != "nca" {
        ours.extend(["--covariates", &covariates]);
    }
    ours.extend(extra);
    let path = adppk(name);
    let mut theirs = vec![command, "--adppk", &path];
    theirs.extend(MAP);
    theirs.extend(extra);
    let (a, b) = (cistern(&ours), cistern(&theirs));
    assert_eq!(a.code, 0, "{}", a.stderr);
    assert_eq!(b.code, 0, "{}", b.stderr);
    (a, b)
}

fn model(name: &str) -> String {
    theoph().join(name).to_string_lossy().into_owned()
}

#[test]
fn fit_population_and_nca_from_adppk_equal_those_from_our_files() {
    let nlme = model("nlme_model.toml");
    let start = model("start_model.toml");
    let runs = [
        ("fit", vec!["--model", &nlme, "--format", "json"]),
        ("population", vec!["--model", &start, "--method", "laplace", "--format", "json"]),
        ("nca", vec!["--format", "json"]),
        ("nca", vec!["--format", "csv", "--partial", "0h..12h", "--auc-rule", "linear"]),
    ];
    for (command, extra) in runs {
        let (ours, theirs) = both(command, "theoph_ug.csv", &extra);
        assert!(ours.stdout.len() > 500, "{command}: {}", ours.stdout);
        assert_eq!(ours.stdout, theirs.stdout, "{command} {extra:?}");
    }
}

/// Every number of `a` and `b` (JSON of the same shape) at the keys `keys`, anywhere.
fn numbers_at(v: &Value, keys: &[&str], out: &mut Vec<(String, f64)>) {
    match v {
        Value::Object(map) => {
            for (k, x) in map {
                match x {
                    Value::Number(n) if keys.contains(&k.as_str()) => {
                        out.push((k.clone(), n.as_f64().unwrap()))
                    }
                    _ => numbers_at(x, keys, out),
                }
            }
        }
        Value::Array(items) => items.iter().for_each(|x| numbers_at(x, keys, out)),
        _ => {}
    }
}

#[test]
fn levels_in_ng_ml_and_in_ug_ml_give_the_same_estimates() {
    // The ng/mL file holds each level times 1000, read back times 1e-3: the same level to
    // within one rounding. The estimates then agree to far better than 1e-8 relative (a
    // millionth of their standard errors, which are about 10 %); the NCA, which does no
    // iteration, to 1e-13.
    let nlme = model("nlme_model.toml");
    let fit = |name| {
        let path = adppk(name);
        let mut args = vec!["fit", "--model", &nlme, "--adppk", &path, "--format", "json"];
        args.extend(MAP);
        let r = cistern(&args);
        assert_eq!(r.code, 0, "{}", r.stderr);
        let mut values = Vec::new();
        let keys = ["value", "se"];
        numbers_at(&serde_json::from_str::<Value>(&r.stdout).unwrap()["subjects"], &keys, &mut values);
        values
    };
    let (ug, ng) = (fit("theoph_ug.csv"), fit("theoph_ng.csv"));
    assert!(ug.len() >= 12 * 4, "{ug:?}");
    for ((k, a), (_, b)) in ug.iter().zip(&ng) {
        assert_rel(*b, *a, 1e-8, 1e-300, k);
    }
    let nca = |name| {
        let path = adppk(name);
        let mut args = vec!["nca", "--adppk", &path, "--format", "json"];
        args.extend(MAP);
        let r = cistern(&args);
        assert_eq!(r.code, 0, "{}", r.stderr);
        let mut values = Vec::new();
        let keys = ["cmax_mg_l", "auc_last_mg_h_l", "auc_inf_obs_mg_h_l", "half_life_h", "cl_f_l_h"];
        numbers_at(&serde_json::from_str::<Value>(&r.stdout).unwrap(), &keys, &mut values);
        values
    };
    let (ug, ng) = (nca("theoph_ug.csv"), nca("theoph_ng.csv"));
    assert_eq!(ug.len(), 12 * 5);
    for ((k, a), (_, b)) in ug.iter().zip(&ng) {
        assert_rel(*b, *a, 1e-13, 1e-300, k);
    }
}

/// The codes and names of cistern-vocabulary.md, the only ones PP records may hold.
const VOCABULARY: &[(&str, &str)] = &[
    ("CMAX", "Max Conc"),
    ("TMAX", "Time of CMAX"),
    ("AUCALL", "AUC All"),
    ("AUCINT", "AUC from T1 to T2"),
    ("AUCIFO", "AUC Infinity Obs"),
    ("AUCIFP", "AUC Infinity Pred"),
    ("AUCPEO", "AUC %Extrapolation Obs"),
    ("AUCTAU", "AUC Over Dosing Interval"),
    ("LAMZHL", "Half-Life Lambda z"),
    ("LAMZNPT", "Number of Points for Lambda z"),
    ("LAMZLL", "Lambda z Lower Limit"),
    ("LAMZUL", "Lambda z Upper Limit"),
    ("R2", "R Squared"),
    ("R2ADJ", "R Squared Adjusted"),
    ("CLO", "Total CL Obs"),
    ("CLFO", "Total CL Obs by F"),
    ("VZO", "Vz Obs"),
    ("VZFO", "Vz Obs by F"),
];

#[test]
fn sdtm_pp_records_hold_the_nca_values_under_vocabulary_codes() {
    let path = adppk("theoph_ng.csv");
    let base = ["nca", "--adppk", &path, "--map", "amount_mg=AMT", "--partial", "0h..12h"];
    let json = cistern(&[&base[..], &["--format", "json"]].concat());
    assert_eq!(json.code, 0, "{}", json.stderr);
    let pp = cistern(&[&base[..], &["--format", "sdtm-pp", "--specimen", "PLASMA"]].concat());
    assert_eq!(pp.code, 0, "{}", pp.stderr);
    let nca: Value = serde_json::from_str(&json.stdout).unwrap();
    let mut reader = csv::Reader::from_reader(pp.stdout.as_bytes());
    let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
    assert_eq!(
        header,
        [
            "STUDYID", "DOMAIN", "USUBJID", "PPSEQ", "PPGRPID", "PPTESTCD", "PPTEST", "PPCAT", "PPORRES",
            "PPORRESU", "PPSTRESC", "PPSTRESN", "PPSTRESU", "PPSPEC", "PPANMETH", "PPSTINT", "PPENINT"
        ]
    );
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    let col = |name: &str| header.iter().position(|h| h == name).unwrap();
    for r in &rows {
        let (code, name) = (&r[col("PPTESTCD")], &r[col("PPTEST")]);
        assert!(VOCABULARY.contains(&(code, name)), "{code} {name}");
        assert_eq!((&r[col("DOMAIN")], &r[col("STUDYID")], &r[col("PPSPEC")]), ("PP", "THEOPH", "PLASMA"));
        assert_eq!(&r[col("PPCAT")], "THEO");
    }
    let subjects = nca["subjects"].as_array().unwrap();
    assert_eq!(subjects.len(), 12);
    let checked = [
        ("CMAX", "cmax_mg_l", "mg/L"),
        ("TMAX", "tmax_h", "h"),
        ("AUCIFO", "auc_inf_obs_mg_h_l", "h*mg/L"),
        ("LAMZHL", "half_life_h", "h"),
        ("CLFO", "cl_f_l_h", "L/h"),
    ];
    for s in subjects {
        let id = s["subject"].as_str().unwrap();
        for (code, key, unit) in checked {
            let row = rows
                .iter()
                .find(|r| &r[col("USUBJID")] == id && &r[col("PPTESTCD")] == code)
                .unwrap_or_else(|| panic!("{id}: no {code} record"));
            let expected = s[key].as_f64().unwrap();
            assert_eq!(row[col("PPSTRESN")].parse::<f64>().unwrap(), expected, "{id} {code}");
            assert_eq!(&row[col("PPSTRESU")], unit);
        }
        // The original result is in the file's unit, ng/mL: Cmax × 1000.
        let cmax = rows.iter().find(|r| &r[col("USUBJID")] == id && &r[col("PPTESTCD")] == "CMAX").unwrap();
        assert_eq!(&cmax[col("PPORRESU")], "ng/mL");
        assert_rel(
            cmax[col("PPORRES")].parse().unwrap(),
            s["cmax_mg_l"].as_f64().unwrap() * 1000.0,
            1e-15,
            1e-300,
            id,
        );
        // The partial area, located by ISO 8601 durations, named by its AUC rule.
        let partial =
            rows.iter().find(|r| &r[col("USUBJID")] == id && &r[col("PPTESTCD")] == "AUCINT").unwrap();
        assert_eq!((&partial[col("PPSTINT")], &partial[col("PPENINT")]), ("PT0H", "PT12H"));
        assert_eq!(&partial[col("PPANMETH")], "LINEAR-UP LOG-DOWN TRAPEZOIDAL METHOD");
        let auc = s["partial_aucs"][0]["auc_mg_h_l"].as_f64().unwrap();
        assert_eq!(partial[col("PPSTRESN")].parse::<f64>().unwrap(), auc);
    }
    // PPSEQ numbers each subject's records from 1.
    let first: Vec<&str> =
        rows.iter().filter(|r| &r[col("USUBJID")] == "THEOPH-S01").map(|r| &r[col("PPSEQ")]).collect();
    assert_eq!(first.first(), Some(&"1"));
    assert_eq!(first.last().map(|s| s.parse::<usize>().unwrap()), Some(first.len()));
}

#[test]
fn sdtm_pp_needs_the_specimen_and_a_study_id() {
    let dir = theoph();
    let (d, l) = (dir.join("doses.csv"), dir.join("levels.csv"));
    let (d, l) = (d.to_str().unwrap(), l.to_str().unwrap());
    let r = cistern(&["nca", "--doses", d, "--levels", l, "--format", "sdtm-pp", "--specimen", "PLASMA"]);
    assert_eq!(r.code, 2);
    assert!(r.stderr.contains("--study-id"), "{}", r.stderr);
    let r = cistern(&["nca", "--doses", d, "--levels", l, "--format", "sdtm-pp", "--study-id", "X"]);
    assert_eq!(r.code, 2);
    assert!(r.stderr.contains("--specimen"), "{}", r.stderr);
    let r = cistern(&[
        "nca",
        "--doses",
        d,
        "--levels",
        l,
        "--format",
        "sdtm-pp",
        "--study-id",
        "X",
        "--specimen",
        "SERUM",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.stdout.lines().nth(1).unwrap().starts_with("X,PP,S01,1,1,CMAX,Max Conc,,"), "{}", r.stdout);
}

#[test]
fn a_case_file_reads_an_adppk_file() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::copy(adppk("theoph_ug.csv"), dir.path().join("adppk.csv")).unwrap();
    std::fs::copy(theoph().join("nlme_model.toml"), dir.path().join("model.toml")).unwrap();
    let case = dir.path().join("case.toml");
    std::fs::write(
        &case,
        "[inputs]\nmodel = \"model.toml\"\nadppk = \"adppk.csv\"\nanalyte = \"THEO\"\n\
         map = [\"amount_mg=AMT\", \"subject=SUBJID\"]\n",
    )
    .unwrap();
    let from_case = cistern(&["fit", "--case", case.to_str().unwrap(), "--format", "json"]);
    let (ours, _) = both("fit", "theoph_ug.csv", &["--model", &model("nlme_model.toml"), "--format", "json"]);
    assert_eq!(from_case.code, 0, "{}", from_case.stderr);
    assert_eq!(from_case.stdout, ours.stdout);
    // `check` reads a case for one subject.
    let text = std::fs::read_to_string(&case).unwrap();
    std::fs::write(&case, format!("[case]\nsubject = \"S03\"\n\n{text}")).unwrap();
    let check = cistern(&["check", case.to_str().unwrap()]);
    assert_eq!(check.code, 0, "{}", check.stderr);
    assert!(check.stdout.contains("12 subject(s) in its study, subject S03"), "{}", check.stdout);
}

#[test]
fn check_and_convert_say_what_the_file_holds_and_convert_round_trips() {
    let path = adppk("theoph_ng.csv");
    let r = cistern(&["check", &path, "--map", "amount_mg=AMT"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stdout.contains(
            "ADPPK file, 12 subject(s), 12 dose(s), 132 level(s), 0 below the limit; covariates: \
             weight_kg; analytes: THEO"
        ),
        "{}",
        r.stdout
    );
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().to_str().unwrap();
    let mut args = vec!["convert", "--adppk", &path, "--out-dir", out];
    args.extend(MAP);
    let r = cistern(&args);
    assert_eq!(r.code, 0, "{}", r.stderr);
    // The converted files give nca the results of the originals (levels within one rounding
    // of ng/mL to mg/L, so compared as numbers).
    let (ours, _) = both("nca", "theoph_ug.csv", &["--format", "json"]);
    let file = |f: &str| dir.path().join(f).to_string_lossy().into_owned();
    let converted =
        cistern(&["nca", "--doses", &file("doses.csv"), "--levels", &file("levels.csv"), "--format", "json"]);
    assert_eq!(converted.code, 0, "{}", converted.stderr);
    let keys = ["cmax_mg_l", "auc_inf_obs_mg_h_l", "cl_f_l_h"];
    let (mut a, mut b) = (Vec::new(), Vec::new());
    numbers_at(&serde_json::from_str(&ours.stdout).unwrap(), &keys, &mut a);
    numbers_at(&serde_json::from_str(&converted.stdout).unwrap(), &keys, &mut b);
    assert_eq!(a.len(), 36);
    for ((k, x), (_, y)) in a.iter().zip(&b) {
        assert_rel(*y, *x, 1e-13, 1e-300, k);
    }
    assert!(
        std::fs::read_to_string(file("covariates.csv")).unwrap().starts_with("subject,weight_kg\nS01,79.6\n")
    );
    // Never over an input: an ADPPK file named doses.csv in the output directory.
    let input = dir.path().join("doses.csv");
    std::fs::copy(&path, &input).unwrap();
    std::fs::remove_file(file("levels.csv")).unwrap();
    let r =
        cistern(&["convert", "--adppk", input.to_str().unwrap(), "--map", "amount_mg=AMT", "--out-dir", out]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("refusing to write the output over the input file"), "{}", r.stderr);
    assert_eq!(std::fs::read(&input).unwrap(), std::fs::read(&path).unwrap());
    assert!(!Path::new(&file("levels.csv")).exists());
}

/// A small valid ADPPK file, one subject, one oral dose and four levels.
const VALID: &str = "\
USUBJID,EVID,MDV,AFRLT,AMT,ROUTE,PARAMCD,AVAL,AVALU,BLQFL,ALLOQ,SS,II
A,1,1,0,100,ORAL,X,,,,,0,
A,0,0,1,,,X,2.5,ug/mL,N,0.1,,
A,0,0,2,,,X,2.0,ug/mL,N,0.1,,
A,0,0,4,,,X,1.5,ug/mL,N,0.1,,
A,0,0,8,,,X,0.8,ug/mL,N,0.1,,
";

/// `VALID` with line `line` (1-based) replaced.
fn with_line(line: usize, text: &str) -> String {
    let mut lines: Vec<&str> = VALID.lines().collect();
    lines[line - 1] = text;
    lines.join("\n") + "\n"
}

#[test]
fn bad_adppk_input_is_located_exit_2_nothing_written() {
    let cases: Vec<(&str, String, &str)> = vec![
        (
            "dose without AMT",
            with_line(2, "A,1,1,0,,ORAL,X,,,,,0,"),
            "line 2, column AMT: a dose row (EVID 1) needs its amount",
        ),
        (
            "observation without a value, MDV 0",
            with_line(3, "A,0,0,1,,,X,,ug/mL,N,0.1,,"),
            "line 3, column AVAL: an observation row (EVID 0, MDV 0) needs its value",
        ),
        (
            "unknown ROUTE",
            with_line(2, "A,1,1,0,100,SUBCUTANEOUS,X,,,,,0,"),
            "line 2, column ROUTE: expected ROUTE ORAL or INTRAVENOUS",
        ),
        (
            "mixed analytes",
            with_line(4, "A,0,0,2,,,Y,2.0,ug/mL,N,0.1,,"),
            "line 4, column PARAMCD: the file holds several analytes (X, Y)",
        ),
        (
            "BLQFL Y without ALLOQ",
            with_line(5, "A,0,0,4,,,X,,ug/mL,Y,,,"),
            "line 5, column BLQFL: a level below the limit needs the limit ALLOQ",
        ),
        ("duplicated row", with_line(4, "A,0,0,1,,,X,2.5,ug/mL,N,0.1,,"), "line 4: this row repeats line 3"),
        (
            "SS 1 without II",
            with_line(2, "A,1,1,0,100,ORAL,X,,,,,1,"),
            "line 2, column SS: SS 1 (steady state before this dose) needs the dosing interval II",
        ),
        (
            "SS 1 with II",
            with_line(2, "A,1,1,0,100,ORAL,X,,,,,1,12"),
            "line 2, column SS: SS 1 (steady state before this dose) is not supported",
        ),
        (
            "unknown unit",
            with_line(3, "A,0,0,1,,,X,2.5,mmol/L,N,0.1,,"),
            "line 3, column AVALU: expected a concentration unit",
        ),
        (
            "other events",
            with_line(3, "A,3,0,1,,,X,2.5,ug/mL,N,0.1,,"),
            "line 3, column EVID: expected EVID 1 (a dose) or 0",
        ),
    ];
    for (what, text, expected) in cases {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("a.csv");
        std::fs::write(&file, &text).unwrap();
        let f = file.to_str().unwrap();
        let out = dir.path().join("out.csv");
        let o = out.to_str().unwrap();
        let outdir = dir.path().join("conv");
        std::fs::create_dir(&outdir).unwrap();
        for args in [
            vec!["nca", "--adppk", f, "--map", "amount_mg=AMT", "-o", o],
            vec!["convert", "--adppk", f, "--map", "amount_mg=AMT", "--out-dir", outdir.to_str().unwrap()],
        ] {
            let r = cistern(&args);
            assert_eq!(r.code, 2, "{what}: {}", r.stderr);
            assert!(r.stderr.contains(&format!("{f}: {expected}")), "{what}: {}", r.stderr);
            assert!(!out.exists() && std::fs::read_dir(&outdir).unwrap().next().is_none(), "{what}");
        }
    }
    // Every problem of a file at once.
    let all =
        format!("{}A,1,1,0,,ORAL,X,,,,,0,\nA,0,0,9,,,X,,ug/mL,Y,,,\nA,1,1,24,100,ORAL,X,,,,,1,\n", VALID);
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("a.csv");
    std::fs::write(&file, all).unwrap();
    let r = cistern(&["check", file.to_str().unwrap(), "--map", "amount_mg=AMT"]);
    assert_eq!(r.code, 2);
    for line in ["line 7, column AMT", "line 8, column BLQFL", "line 9, column SS"] {
        assert!(r.stderr.contains(line), "{line}: {}", r.stderr);
    }
}

#[test]
fn the_map_states_units_and_names_and_unread_columns_are_listed_once() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("a.csv");
    let text = "USUBJID,EVID,AFRLT,AMT,ROUTE,AVAL,AVALU,CRCLBL,SITE\n\
                A,1,0,100,ORAL,,,90,x\n\
                A,0,1,,,2.5,ug/mL,90,y\n";
    std::fs::write(&file, text).unwrap();
    let f = file.to_str().unwrap();
    let r = cistern(&["check", f, "--map", "amount_g=AMT"]);
    assert_eq!(r.code, 0, "{text}\n{}", r.stderr);
    assert!(r.stderr.contains("column CRCLBL is not read"), "{}", r.stderr);
    let r = ran({
        let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
        c.args([
            "convert",
            "--adppk",
            f,
            "--map",
            "amount_g=AMT",
            "--map",
            "crcl_ml_min=CRCLBL",
            "--out-dir",
        ])
        .arg(dir.path());
        c
    });
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.stderr.matches("columns not read: SITE").count(), 1, "{}", r.stderr);
    let doses = std::fs::read_to_string(dir.path().join("doses.csv")).unwrap();
    assert!(doses.contains(",100000.0,oral,"), "{doses}");
    let cov = std::fs::read_to_string(dir.path().join("covariates.csv")).unwrap();
    assert_eq!(cov, "subject,crcl_ml_min\nA,90.0\n");
    let r = cistern(&["check", f, "--map", "amount_kg=AMT", "--map", "nonsense"]);
    assert_eq!(r.code, 2);
    assert!(r.stderr.contains("--map: unknown amount unit 'kg'"), "{}", r.stderr);
    assert!(r.stderr.contains("--map: expected OURS=THEIRS"), "{}", r.stderr);
}

#[test]
fn a_report_from_an_adppk_case_shows_what_the_same_case_from_our_files_shows() {
    let dir = tempfile::tempdir().unwrap();
    for (from, to) in [
        (PathBuf::from(adppk("theoph_ug.csv")), "adppk.csv"),
        (theoph().join("nlme_model.toml"), "model.toml"),
        (theoph().join("doses.csv"), "doses.csv"),
        (theoph().join("levels.csv"), "levels.csv"),
        (theoph().join("covariates.csv"), "covariates.csv"),
    ] {
        std::fs::copy(from, dir.path().join(to)).unwrap();
    }
    let plan = "[plan]\ntargets = [\"auc24=50..150\"]\namounts = \"200..600/100\"\nevery = \"12h\"\nroute = \"oral\"\n";
    let inputs = [
        "adppk = \"adppk.csv\"\nmap = [\"amount_mg=AMT\", \"subject=SUBJID\"]\n",
        "doses = \"doses.csv\"\nlevels = \"levels.csv\"\ncovariates = \"covariates.csv\"\n",
    ];
    let mut pages = Vec::new();
    for (i, input) in inputs.iter().enumerate() {
        let case = format!("[case]\nsubject = \"S01\"\n\n[inputs]\nmodel = \"model.toml\"\n{input}\n{plan}");
        std::fs::write(dir.path().join(format!("case{i}.toml")), case).unwrap();
        let r = crate::common::cistern_at(
            dir.path(),
            &["report", &format!("case{i}.toml"), "-o", &format!("r{i}.pdf")],
            "0",
        );
        assert_eq!(r.code, 0, "{}", r.stderr);
        pages.push(crate::common::page_texts(&std::fs::read(dir.path().join(format!("r{i}.pdf"))).unwrap()));
    }
    // The estimates, the plan and the advice are the same: every page, up to the block that
    // lists the input files and their digests.
    let before_inputs = |pages: &[String]| -> Vec<String> {
        let n = pages.iter().position(|p| p.contains("Reproducibility\n")).expect("the inputs block") + 1;
        pages[..n].iter().map(|p| p.split("Reproducibility\n").next().unwrap().to_string()).collect()
    };
    let (a, b) = (before_inputs(&pages[0]), before_inputs(&pages[1]));
    assert!(a.len() >= 3 && a[0].contains("clearance (L/h)\n1.715"), "{a:?}");
    assert_eq!(a, b);
}
