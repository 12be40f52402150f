//! `cistern sweep` and `cistern merge`: the population statistics against closed forms,
//! determinism across thread counts and shards, and the bad-input catalog.
//!
//! The closed forms rest on one exact identity: at steady state AUC24 = daily dose / CL,
//! whatever V is (docs/references.md, case 10). With CL log-normal, ln CL ~ N(ln CL_typ, ω²),
//! the share of subjects with AUC24 in a window and the percentiles of AUC24 follow from the
//! normal CDF and quantile function (statrs). The sweep draws a finite sample, so each check
//! allows the Monte-Carlo error, stated from the binomial standard error beside it.

use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use cistern::plan::candidates::{Durations, grid};
use cistern::plan::targets::{Limits, parse_target};
use cistern::sweep::population::{CovariateSource, Population, parse_draw};
use cistern::sweep::sketch::RELATIVE_ERROR;
use cistern::sweep::state::{BUILD, Setup, Shard, SweepState};
use cistern::sweep::summary::{Summary, SummaryRow};
use cistern::sweep::{PER_SUBJECT_HEADER, Sweep};
use cistern::{covariates::Covariates, dosing::Regimen, dosing::Route, io::output::Format};
use serde_json::json;
use statrs::distribution::{ContinuousCDF, Normal};
use std::path::Path;
use std::process::Command;

/// CL log-normal around 4 L/h with CV 30 %, V around 50 L with CV 25 %, correlated 0.3;
/// no covariates. Invented values.
const MODEL: &str = include_str!("../fixtures/plain_model.toml");

/// The same with CL scaled by creatinine clearance (power 0.75 at 100 mL/min) and V by weight.
const COVARIATE_MODEL: &str = include_str!("../fixtures/covariate_model.toml");

fn model(text: &str) -> PopulationModel {
    PopulationModel::parse(&TomlText::new("model.toml", text)).expect("a valid model")
}

/// ω of ln CL for CV 30 %: ω² = ln(1 + CV²).
fn omega_cl() -> f64 {
    (1.0f64 + 0.3 * 0.3).ln().sqrt()
}

/// Infusions of 1 h: 1000 mg every 12 h, 750 mg every 8 h, 1500 mg every 24 h (daily 2000,
/// 2250 and 1500 mg).
fn candidates() -> Vec<Regimen> {
    let mut c = grid(&[1000.0], &[12.0], Route::Infusion, &Durations::Fixed(vec![1.0])).unwrap();
    c.extend(grid(&[750.0], &[8.0], Route::Infusion, &Durations::Fixed(vec![1.0])).unwrap());
    c.extend(grid(&[1500.0], &[24.0], Route::Infusion, &Durations::Fixed(vec![1.0])).unwrap());
    c
}

/// Sweep subjects 0..n of `population` through the library; the summary and the per-subject CSV.
fn sweep_summary(population: &Population, candidates: &[Regimen], n: u64, target: &str) -> (Summary, String) {
    let targets = vec![parse_target(target).unwrap()];
    let limits = Limits { max_trough_mg_l: Some(15.0), max_risk: 0.1, ..Limits::default() };
    let sweep = Sweep { population, candidates, targets: &targets, limits: &limits, seed: 2020 };
    let mut rows = Vec::new();
    let tallies = sweep.run(0..n, Some(&mut rows), &mut |_| {}).expect("the sweep runs");
    let setup = Setup::new(json!("test"), 2020, n, candidates, &targets, &limits);
    let state = SweepState::new(setup, Shard::WHOLE, tallies, None);
    (Summary::of(&state), String::from_utf8(rows).unwrap())
}

/// Checks one regimen's PTA of an AUC24 window and its AUC24 percentiles against the
/// closed forms for ln CL ~ N(ln `cl_median`, ω²).
fn check_closed_form(row: &SummaryRow, cl_median: f64, window: (f64, f64)) {
    let n = row.subjects as f64;
    let daily = row.daily_mg;
    let ln_cl = Normal::new(cl_median.ln(), omega_cl()).unwrap();
    // AUC24 in [lo, hi] ⇔ CL in [daily/hi, daily/lo].
    let pta = ln_cl.cdf((daily / window.0).ln()) - ln_cl.cdf((daily / window.1).ln());
    // Tolerance: 4 binomial standard errors of a share estimated from n subjects.
    let se = (pta * (1.0 - pta) / n).sqrt();
    assert!(
        (row.pta - pta).abs() <= 4.0 * se,
        "regimen {}: PTA {} vs closed form {pta} (4 SE = {})",
        row.index,
        row.pta,
        4.0 * se
    );
    // The p-quantile of AUC24 is daily / (the (1 − p)-quantile of CL). The sample's
    // nearest-rank p-quantile lies between the true quantiles at p ∓ 4·√(p(1 − p)/n) (4
    // binomial SE of the share below it); the sketch adds at most its relative error.
    let auc_quantile = |p: f64| daily / ln_cl.inverse_cdf(1.0 - p).exp();
    let got = [row.auc24_mg_h_l.p05, row.auc24_mg_h_l.p50, row.auc24_mg_h_l.p95];
    for (p, got) in [0.05, 0.5, 0.95].into_iter().zip(got) {
        let got = got.expect("a percentile");
        let d = 4.0 * (p * (1.0 - p) / n).sqrt();
        let (lo, hi) =
            (auc_quantile(p - d) * (1.0 - RELATIVE_ERROR), auc_quantile(p + d) * (1.0 + RELATIVE_ERROR));
        assert!(
            (lo..=hi).contains(&got),
            "regimen {}: AUC24 p{} = {got}, expected {} within [{lo}, {hi}]",
            row.index,
            p * 100.0,
            auc_quantile(p)
        );
    }
}

/// The AUC24 window 400–600 mg·h/L: Rybak MJ et al., Am J Health-Syst Pharm
/// 2020;77(11):835–864 (vancomycin consensus guideline; AUC24/MIC 400–600 assuming MIC 1 mg/L).
/// Used here as a check value only.
const PUBLISHED_WINDOW: (f64, f64) = (400.0, 600.0);

#[test]
fn pta_and_auc24_percentiles_match_the_log_normal_closed_form() {
    let population = Population::from_model(model(MODEL), CovariateSource::None).unwrap();
    let (summary, _) = sweep_summary(&population, &candidates(), 20_000, "auc24=400..600");
    assert_eq!(summary.regimens.len(), 3);
    for row in &summary.regimens {
        assert_eq!(row.subjects, 20_000);
        check_closed_form(row, 4.0, PUBLISHED_WINDOW);
    }
    // Reference case 10 (docs/references.md): 1000 mg every 12 h with CL = 4 L/h gives
    // AUC24 = 500 mg·h/L (derived identity), inside the published window; the typical subject
    // is the median one.
    let median = summary.regimens[0].auc24_mg_h_l.p50.unwrap();
    assert!((median / 500.0 - 1.0).abs() < 0.02, "median AUC24 {median} vs 500 for the typical CL");
}

#[test]
fn a_covariate_pool_shifts_clearance_as_the_model_says() {
    // One pool subject: a 50-year-old man of 70 kg with serum creatinine 0.9 mg/dL, whose
    // Cockcroft–Gault clearance is 97.22 mL/min (reference case 9, Cockcroft DW, Gault
    // MH. Nephron 1976;16:31–41). Typical CL = 4 · (97.22/100)^0.75 L/h.
    let mut cov = Covariates::default();
    for (k, v) in [("age_y", 50.0), ("weight_kg", 70.0), ("scr_mg_dl", 0.9)] {
        cov.set(k, v);
    }
    cov.sex = Some(cistern::covariates::Sex::Male);
    let pool = CovariateSource::Pool(vec![("P1".into(), cov)]);
    let population = Population::from_model(model(COVARIATE_MODEL), pool).unwrap();
    let (summary, rows) = sweep_summary(&population, &candidates(), 20_000, "auc24=400..600");
    let cl_median = 4.0 * (97.2222 / 100.0f64).powf(0.75);
    for row in &summary.regimens {
        check_closed_form(row, cl_median, PUBLISHED_WINDOW);
    }
    assert!(rows.lines().nth(1).unwrap().starts_with("1,P1,1,"), "the origin names the pool subject");
}

/// Sample mean and variance.
fn mean_var(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let m = x.iter().sum::<f64>() / n;
    (m, x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1.0))
}

#[test]
fn drawn_clearance_and_volume_have_the_model_variances_and_correlation() {
    let population = Population::from_model(model(MODEL), CovariateSource::None).unwrap();
    let n = 20_000;
    let (_, rows) = sweep_summary(&population, &candidates()[..1], n, "auc24=400..600");
    let mut lines = rows.lines();
    assert_eq!(lines.next(), Some(PER_SUBJECT_HEADER));
    let (mut ln_cl, mut ln_v) = (Vec::new(), Vec::new());
    for line in lines {
        let f: Vec<&str> = line.split(',').collect();
        ln_cl.push(f[3].parse::<f64>().unwrap().ln());
        ln_v.push(f[4].parse::<f64>().unwrap().ln());
    }
    assert_eq!(ln_cl.len(), n as usize);
    let (w2_cl, w2_v) = ((1.0f64 + 0.09).ln(), (1.0f64 + 0.0625).ln());
    let (m_cl, v_cl) = mean_var(&ln_cl);
    let (m_v, v_v) = mean_var(&ln_v);
    let nf = n as f64;
    // Means within 4 SE (ω/√n); variances within 4 SE (ω²·√(2/(n − 1)) for normal data).
    assert!((m_cl - 4f64.ln()).abs() < 4.0 * (w2_cl / nf).sqrt(), "mean ln CL {m_cl}");
    assert!((m_v - 50f64.ln()).abs() < 4.0 * (w2_v / nf).sqrt(), "mean ln V {m_v}");
    assert!((v_cl - w2_cl).abs() < 4.0 * w2_cl * (2.0 / (nf - 1.0)).sqrt(), "var ln CL {v_cl} vs {w2_cl}");
    assert!((v_v - w2_v).abs() < 4.0 * w2_v * (2.0 / (nf - 1.0)).sqrt(), "var ln V {v_v} vs {w2_v}");
    // Correlation 0.3: Fisher's z = atanh r has SE 1/√(n − 3).
    let cov: f64 = ln_cl.iter().zip(&ln_v).map(|(a, b)| (a - m_cl) * (b - m_v)).sum::<f64>() / (nf - 1.0);
    let r = cov / (v_cl * v_v).sqrt();
    assert!((r.atanh() - 0.3f64.atanh()).abs() < 4.0 / (nf - 3.0).sqrt(), "correlation {r}");
}

#[test]
fn output_is_identical_at_one_and_two_threads() {
    let draws =
        ["weight_kg=normal:75:12:40..150", "age_y=uniform:30:85", "scr_mg_dl=lognormal:1:0.3", "sex=F:0.5"];
    let draws = draws.iter().map(|d| parse_draw(d).unwrap()).collect();
    let population = Population::from_model(model(COVARIATE_MODEL), CovariateSource::Draws(draws)).unwrap();
    // 40 regimens: 1,638 subjects per chunk, so 3,000 subjects span two chunks.
    let amounts: Vec<f64> = (1..=10).map(|i| 250.0 * f64::from(i)).collect();
    let many =
        grid(&amounts, &[8.0, 12.0, 24.0, 48.0], Route::Infusion, &Durations::Fixed(vec![1.0])).unwrap();
    assert_eq!(many.len(), 40);
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        pool.install(|| {
            let (summary, rows) = sweep_summary(&population, &many, 3_000, "trough=10..20");
            let mut csv = Vec::new();
            summary.write(&mut csv, Format::Csv, None).unwrap();
            (csv, rows)
        })
    };
    let (one, two) = (run(1), run(2));
    assert!(one.0 == two.0, "the summary differs between 1 and 2 threads");
    assert!(one.1 == two.1, "the per-subject rows differ between 1 and 2 threads");
    assert_eq!(one.1.lines().count(), 1 + 3_000 * 40);
}

// ---- The binary ----

/// What one run of the binary produced.
struct Ran {
    code: i32,
    stdout: String,
    stderr: String,
}

fn cistern_env(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> Ran {
    let out = Command::new(env!("CARGO_BIN_EXE_cistern"))
        .args(args)
        .envs(env.iter().copied())
        .current_dir(dir)
        .output()
        .expect("the cistern binary runs");
    Ran {
        code: out.status.code().expect("exited, not killed by a signal"),
        stdout: String::from_utf8(out.stdout).unwrap(),
        stderr: String::from_utf8(out.stderr).unwrap(),
    }
}

fn cistern(dir: &Path, args: &[&str]) -> Ran {
    cistern_env(dir, args, &[])
}

#[track_caller]
fn ok(dir: &Path, args: &[&str]) -> Ran {
    let ran = cistern(dir, args);
    assert_eq!(ran.code, 0, "cistern {args:?} failed:\n{}", ran.stderr);
    ran
}

fn read(dir: &Path, name: &str) -> Vec<u8> {
    std::fs::read(dir.join(name)).unwrap_or_else(|e| panic!("{name}: {e}"))
}

/// A directory with the covariate model and a small invented covariate pool.
fn workspace() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("model.toml"), COVARIATE_MODEL).unwrap();
    std::fs::write(dir.path().join("plain.toml"), MODEL).unwrap();
    // Invented subjects, not real data.
    std::fs::write(
        dir.path().join("pool.csv"),
        "subject,age_y,sex,weight_kg,scr_mg_dl\nA,62,M,80,1.1\nB,45,F,60,0.8\n\"C, 3\",75,M,72,1.6\nD,33,F,55,0.7\n",
    )
    .unwrap();
    dir
}

/// The sweep used by the shard tests.
const SWEEP: &str = "sweep --model model.toml --covariates pool.csv --subjects 1001 --seed 9 \
--amounts 500..1500/250 --every 8h,12h,24h --max-rate 10mg/min --target auc24=400..600 \
--target trough=..20 --max-peak 40 --max-trough 25 --max-daily 4g";

fn args(base: &str, extra: &[&str]) -> Vec<String> {
    base.split_whitespace().map(String::from).chain(extra.iter().map(|s| s.to_string())).collect()
}

fn run_ok(dir: &Path, args: &[String]) -> Ran {
    ok(dir, &args.iter().map(String::as_str).collect::<Vec<_>>())
}

#[test]
fn merged_shards_equal_the_unsharded_run_byte_for_byte() {
    let ws = workspace();
    let dir = ws.path();
    let whole = run_ok(dir, &args(SWEEP, &["-o", "summary.csv", "--per-subject", "all.csv"]));
    assert!(whole.stderr.contains("caution: Not clinical advice"), "{}", whole.stderr);
    for i in 1..=3 {
        let (shard, state, part) = (format!("{i}/3"), format!("shard-{i}.json"), format!("part-{i}.csv"));
        run_ok(dir, &args(SWEEP, &["--shard", &shard, "-o", &state, "--per-subject", &part]));
    }
    // Any order of the shards.
    ok(dir, &["merge", "shard-3.json", "shard-1.json", "shard-2.json", "-o", "merged.csv"]);
    let summary = read(dir, "summary.csv");
    assert!(summary == read(dir, "merged.csv"), "the merged summary differs from the unsharded one");
    // Per-subject files concatenate in shard order, header once.
    let mut joined = Vec::new();
    for i in 1..=3 {
        let part = read(dir, &format!("part-{i}.csv"));
        let text = std::str::from_utf8(&part).unwrap();
        let body = if i == 1 { text } else { text.split_once('\n').unwrap().1 };
        joined.extend_from_slice(body.as_bytes());
    }
    assert!(joined == read(dir, "all.csv"), "the concatenated per-subject files differ");
    // The JSON summary merges the same way, and more shards than subjects leave some empty.
    let tiny = args(SWEEP, &[]).join(" ").replace("--subjects 1001", "--subjects 3");
    run_ok(dir, &args(&tiny, &["--format", "json", "-o", "tiny.json"]));
    let mut states = Vec::new();
    for i in 1..=5 {
        let name = format!("t{i}.json");
        run_ok(dir, &args(&tiny, &["--shard", &format!("{i}/5"), "-o", &name]));
        states.push(name);
    }
    let mut merge = vec!["merge"];
    merge.extend(states.iter().map(String::as_str));
    merge.extend(["--format", "json", "-o", "tiny-merged.json"]);
    ok(dir, &merge);
    assert!(read(dir, "tiny.json") == read(dir, "tiny-merged.json"));
    // Subjects and regimens as stated: 1001 subjects × 15 regimens.
    let text = String::from_utf8(summary).unwrap();
    let mut reader = csv::Reader::from_reader(text.as_bytes());
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), 15);
    assert!(rows.iter().all(|r| &r[6] == "1001"));
    assert_eq!(String::from_utf8(read(dir, "all.csv")).unwrap().lines().count(), 1 + 1001 * 15);
}

#[test]
fn the_thread_count_does_not_change_the_binary_output() {
    let ws = workspace();
    let dir = ws.path();
    let mut outputs = Vec::new();
    for threads in ["1", "2"] {
        let (summary, rows) = (format!("s{threads}.csv"), format!("p{threads}.csv"));
        let a = args(SWEEP, &["-o", &summary, "--per-subject", &rows]);
        let a: Vec<&str> = a.iter().map(String::as_str).collect();
        let ran = cistern_env(dir, &a, &[("RAYON_NUM_THREADS", threads)]);
        assert_eq!(ran.code, 0, "{}", ran.stderr);
        outputs.push((read(dir, &summary), read(dir, &rows)));
    }
    assert!(outputs[0] == outputs[1], "1 and 2 threads give different output");
}

#[test]
fn merge_refuses_missing_duplicate_and_foreign_shards() {
    let ws = workspace();
    let dir = ws.path();
    for i in 1..=3 {
        run_ok(dir, &args(SWEEP, &["--shard", &format!("{i}/3"), "-o", &format!("s{i}.json")]));
    }
    let other = args(SWEEP, &[]).join(" ").replace("--seed 9", "--seed 10");
    run_ok(dir, &args(&other, &["--shard", "2/3", "-o", "other.json"]));
    run_ok(dir, &args(SWEEP, &["--shard", "1/2", "-o", "half.json"]));
    std::fs::write(dir.join("junk.json"), "{\"format\": \"something else\"}").unwrap();
    let cases: [(&[&str], &str); 5] = [
        (&["s1.json", "s3.json"], "shards missing: 2/3"),
        (&["s1.json", "s2.json", "s2.json", "s3.json"], "shard 2/3 is given twice"),
        (&["s1.json", "other.json", "s3.json"], "another sweep than s1.json (they differ in: seed)"),
        (&["s1.json", "half.json"], "the shards must split the sweep the same way"),
        (&["junk.json"], "junk.json: not a sweep state"),
    ];
    for (files, says) in cases {
        let mut a = vec!["merge"];
        a.extend(files);
        a.extend(["-o", "out.csv"]);
        let ran = cistern(dir, &a);
        assert_eq!(ran.code, 2, "merge {files:?}: {}", ran.stderr);
        assert!(ran.stderr.contains(says), "merge {files:?} should say '{says}':\n{}", ran.stderr);
        assert!(!dir.join("out.csv").exists(), "no output after a refused merge");
    }
}

/// Runs `cistern merge` with `args` and checks that it refuses with exit code 2, saying `says`
/// and writing none of `outputs`.
#[track_caller]
fn refused(dir: &Path, args: &[&str], says: &str, outputs: &[&str]) {
    let mut a = vec!["merge"];
    a.extend(args);
    let ran = cistern(dir, &a);
    assert_eq!(ran.code, 2, "merge {args:?}: {}", ran.stderr);
    assert!(ran.stderr.contains(says), "merge {args:?} should say '{says}':\n{}", ran.stderr);
    assert!(!ran.stderr.contains("panicked"), "{}", ran.stderr);
    for out in outputs {
        assert!(!dir.join(out).exists(), "merge {args:?} wrote {out}");
    }
}

/// The shard sweep of [`SWEEP`] in `n` shards with their per-subject parts (`s{i}.json`,
/// `p{i}.csv`), and the unsharded run (`summary.csv`, `all.csv`).
fn sharded(dir: &Path, n: u64) {
    run_ok(dir, &args(SWEEP, &["-o", "summary.csv", "--per-subject", "all.csv"]));
    for i in 1..=n {
        let (shard, state, part) = (format!("{i}/{n}"), format!("s{i}.json"), format!("p{i}.csv"));
        run_ok(dir, &args(SWEEP, &["--shard", &shard, "-o", &state, "--per-subject", &part]));
    }
}

#[test]
fn merged_states_merge_again_in_stages_byte_for_byte() {
    let ws = workspace();
    let dir = ws.path();
    sharded(dir, 4);
    let summary = read(dir, "summary.csv");
    let all = read(dir, "all.csv");
    // Hierarchically: two halves, then the halves; the rows joined with the merged state.
    ok(dir, &["merge", "s2.json", "s1.json", "--state-out", "a.json"]);
    ok(dir, &["merge", "s4.json", "s3.json", "--state-out", "b.json"]);
    let parts = ["p3.csv", "p1.csv", "p4.csv", "p2.csv"];
    let mut last = vec!["merge", "b.json", "a.json", "-o", "h.csv", "--state-out", "whole.json", "--rows"];
    last.extend(parts);
    last.extend(["--per-subject", "h-rows.csv"]);
    ok(dir, &last);
    assert!(read(dir, "h.csv") == summary, "the merge of merges differs from the unsharded summary");
    assert!(read(dir, "h-rows.csv") == all, "the rows joined after a merge of merges differ");
    // The whole merged state merges again, alone, to the same summary, and joins the parts.
    let mut again = vec!["merge", "whole.json", "-o", "again.csv", "--rows"];
    again.extend(parts);
    again.extend(["--per-subject", "again-rows.csv"]);
    ok(dir, &again);
    assert!(read(dir, "again.csv") == summary && read(dir, "again-rows.csv") == all);
    // Incrementally, one shard at a time in the order they might finish.
    ok(dir, &["merge", "s3.json", "--state-out", "r1.json"]);
    ok(dir, &["merge", "r1.json", "s1.json", "--state-out", "r2.json"]);
    ok(dir, &["merge", "s4.json", "r2.json", "--state-out", "r3.json"]);
    ok(dir, &["merge", "r3.json", "s2.json", "--format", "json", "-o", "inc.json"]);
    run_ok(dir, &args(SWEEP, &["--format", "json", "-o", "summary.json"]));
    assert!(read(dir, "inc.json") == read(dir, "summary.json"), "the incremental merge differs");
    // The partial states are not summaries, and hold their shards once.
    refused(dir, &["a.json", "-o", "x.csv"], "shards missing: 3/4, 4/4", &["x.csv"]);
    refused(
        dir,
        &["a.json", "s2.json", "--state-out", "x.json"],
        "shard 2/4 is given twice: a.json and s2.json",
        &["x.json"],
    );
    refused(
        dir,
        &["r3.json", "s2.json", "--state-out", "r3.json"],
        "refusing to write the output over the input file",
        &[],
    );
}

#[test]
fn a_stale_per_subject_part_is_refused() {
    let ws = workspace();
    let dir = ws.path();
    sharded(dir, 3);
    // The first part of an earlier sweep of 1,200 subjects: it starts where shard 1/3 starts
    // (subject 1) but runs on to subject 400, where shard 1/3 of 1,001 ends at 334.
    let earlier = args(SWEEP, &[]).join(" ").replace("--subjects 1001", "--subjects 1200");
    run_ok(dir, &args(&earlier, &["--shard", "1/3", "-o", "old.json", "--per-subject", "old-p1.csv"]));
    let states = ["s1.json", "s2.json", "s3.json", "-o", "out.csv", "--per-subject", "rows.csv", "--rows"];
    let with_parts = |parts: &[&'static str]| -> Vec<&str> {
        states.iter().copied().chain(parts.iter().copied()).collect()
    };
    refused(
        dir,
        &with_parts(&["old-p1.csv", "p2.csv", "p3.csv"]),
        "old-p1.csv: it holds subjects up to 400, but shard 1/3 (subjects 1–333) ends at subject 333: a stale part?",
        &["out.csv", "rows.csv"],
    );
    // A part of another split starts where no shard starts.
    run_ok(dir, &args(SWEEP, &["--shard", "2/2", "-o", "half.json", "--per-subject", "half.csv"]));
    refused(
        dir,
        &with_parts(&["p1.csv", "half.csv", "p3.csv"]),
        "half.csv: it holds rows from subject 501 on, but no shard",
        &["out.csv", "rows.csv"],
    );
    // A part given twice, or missing.
    refused(
        dir,
        &with_parts(&["p1.csv", "p2.csv", "p2.csv", "p3.csv"]),
        "p2.csv and p2.csv both hold the rows of shard 2/3",
        &["rows.csv"],
    );
    refused(
        dir,
        &with_parts(&["p1.csv", "p3.csv"]),
        "no per-subject rows given for shard 2/3 (subjects 334–667)",
        &["rows.csv"],
    );
    // Not a per-subject file at all.
    refused(
        dir,
        &with_parts(&["p1.csv", "pool.csv", "p3.csv"]),
        "pool.csv: line 1: expected the per-subject header",
        &["rows.csv"],
    );
    // The parts as written are accepted, in any order.
    let mut a = vec!["merge"];
    a.extend(with_parts(&["p3.csv", "p1.csv", "p2.csv"]));
    let ran = ok(dir, &a);
    assert!(ran.stderr.contains("caution: Not clinical advice"), "{}", ran.stderr);
    assert!(
        read(dir, "rows.csv") == read(dir, "all.csv") && read(dir, "out.csv") == read(dir, "summary.csv")
    );
}

#[test]
fn a_part_from_another_setup_is_refused() {
    let ws = workspace();
    let dir = ws.path();
    sharded(dir, 3);
    // The same subjects and row count, from another seed: only the digest tells.
    let other = args(SWEEP, &[]).join(" ").replace("--seed 9", "--seed 10");
    run_ok(dir, &args(&other, &["--shard", "2/3", "-o", "other.json", "--per-subject", "other-p2.csv"]));
    assert_eq!(
        read(dir, "other-p2.csv").iter().filter(|b| **b == b'\n').count(),
        read(dir, "p2.csv").iter().filter(|b| **b == b'\n').count()
    );
    let a = [
        "s1.json",
        "s2.json",
        "s3.json",
        "--per-subject",
        "rows.csv",
        "--rows",
        "p1.csv",
        "other-p2.csv",
        "p3.csv",
    ];
    refused(dir, &a, "other-p2.csv: its SHA-256 is", &["rows.csv"]);
    refused(dir, &a, "but shard 2/3 (subjects 334–667) wrote rows of SHA-256", &["rows.csv"]);
    // A part whose shard was swept without --per-subject has nothing to be checked against.
    run_ok(dir, &args(SWEEP, &["--shard", "2/3", "-o", "bare.json"]));
    let a = [
        "s1.json",
        "bare.json",
        "s3.json",
        "--per-subject",
        "rows.csv",
        "--rows",
        "p1.csv",
        "p2.csv",
        "p3.csv",
    ];
    refused(dir, &a, "shard 2/3 (subjects 334–667) was swept without --per-subject", &["rows.csv"]);
}

#[test]
fn a_part_with_the_wrong_row_count_is_refused() {
    let ws = workspace();
    let dir = ws.path();
    sharded(dir, 3);
    // The last row dropped: the last subject is still there (it has 15 rows), one row is not.
    let part = String::from_utf8(read(dir, "p3.csv")).unwrap();
    let cut = part.trim_end_matches('\n').rsplit_once('\n').unwrap().0;
    std::fs::write(dir.join("cut.csv"), format!("{cut}\n")).unwrap();
    let a = [
        "s1.json",
        "s2.json",
        "s3.json",
        "--per-subject",
        "rows.csv",
        "--rows",
        "p1.csv",
        "p2.csv",
        "cut.csv",
    ];
    refused(
        dir,
        &a,
        "cut.csv: it has 5009 rows, but shard 3/3 (subjects 668–1001) wrote 5010",
        &["rows.csv"],
    );
    // A row added at the end.
    std::fs::write(dir.join("long.csv"), format!("{part}{}\n", part.trim_end().rsplit_once('\n').unwrap().1))
        .unwrap();
    let a = [
        "s1.json",
        "s2.json",
        "s3.json",
        "--per-subject",
        "rows.csv",
        "--rows",
        "p1.csv",
        "p2.csv",
        "long.csv",
    ];
    refused(
        dir,
        &a,
        "long.csv: it has 5011 rows, but shard 3/3 (subjects 668–1001) wrote 5010",
        &["rows.csv"],
    );
}

#[test]
fn more_than_999_shards_merge_and_join_in_subject_order() {
    // 1,001 shards of 1,500 subjects, named without zero padding, so that the shell's order
    // of the names (shard-1, shard-10, shard-100, shard-1000, shard-1001, shard-101, ...) is
    // not the shards' order. The shards are swept through the library, as the binary does.
    let population = Population::from_model(model(MODEL), CovariateSource::None).unwrap();
    let regimens = candidates();
    let targets = vec![parse_target("auc24=400..600").unwrap()];
    let limits = Limits { max_trough_mg_l: Some(15.0), max_risk: 0.1, ..Limits::default() };
    let sweep =
        Sweep { population: &population, candidates: &regimens, targets: &targets, limits: &limits, seed: 5 };
    let (subjects, count) = (1_500, 1_001);
    let setup = Setup::new(json!("test"), 5, subjects, &regimens, &targets, &limits);
    let ws = tempfile::tempdir().unwrap();
    let dir = ws.path();
    let mut names = Vec::new();
    for index in 1..=count {
        let mut rows = Vec::new();
        let state =
            sweep.run_shard(setup.clone(), Shard { index, count }, Some(&mut rows), &mut |_| {}).unwrap();
        let mut json = Vec::new();
        state.write(&mut json).unwrap();
        std::fs::write(dir.join(format!("shard-{index}.json")), json).unwrap();
        std::fs::write(dir.join(format!("part-{index}.csv")), rows).unwrap();
        names.push(index.to_string());
    }
    names.sort();
    assert_eq!(&names[..5], ["1", "10", "100", "1000", "1001"], "the names sort out of shard order");
    let mut a = vec!["merge".to_string()];
    a.extend(names.iter().map(|i| format!("shard-{i}.json")));
    a.extend(["-o", "summary.csv", "--per-subject", "rows.csv", "--rows"].map(String::from));
    a.extend(names.iter().map(|i| format!("part-{i}.csv")));
    run_ok(dir, &a);
    let mut whole_rows = Vec::new();
    let whole = sweep.run_shard(setup, Shard::WHOLE, Some(&mut whole_rows), &mut |_| {}).unwrap();
    let mut summary = Vec::new();
    Summary::of(&whole).write(&mut summary, Format::Csv, None).unwrap();
    assert!(read(dir, "summary.csv") == summary, "the merged summary differs from the whole sweep's");
    assert!(read(dir, "rows.csv") == whole_rows, "the joined rows are not in subject order");
}

#[test]
fn the_build_identifier_is_recorded_and_checked() {
    let ws = workspace();
    let dir = ws.path();
    for i in 1..=2 {
        run_ok(dir, &args(SWEEP, &["--shard", &format!("{i}/2"), "-o", &format!("s{i}.json")]));
    }
    let state = SweepState::parse(&String::from_utf8(read(dir, "s2.json")).unwrap()).unwrap();
    // The build the binary reports, which is this package's.
    assert_eq!(state.setup.cistern_build, BUILD);
    let version = ok(dir, &["--version"]).stdout;
    assert!(version.contains(BUILD), "--version does not show the build '{BUILD}': {version}");
    assert!(BUILD.starts_with("sources ") && BUILD.len() > "sources 0123456789abcdef, ".len(), "{BUILD}");
    // A shard of another build of the same version is refused, by name.
    let mut other = state.clone();
    other.setup.cistern_build = "sources 0000000000000000, elsewhere".into();
    other.fingerprint = other.setup.fingerprint();
    let mut json = Vec::new();
    other.write(&mut json).unwrap();
    std::fs::write(dir.join("other-build.json"), json).unwrap();
    refused(
        dir,
        &["s1.json", "other-build.json", "-o", "out.csv"],
        "(they differ in: cistern_build)",
        &["out.csv"],
    );
    ok(dir, &["merge", "s1.json", "s2.json", "-o", "out.csv"]);
}

#[test]
fn a_table_of_individual_parameters_gives_the_exact_shares() {
    let ws = workspace();
    let dir = ws.path();
    // The layout of `cistern fit`'s CSV output (extra columns ignored; an unconverged fit left
    // out). Invented values.
    std::fs::write(
        dir.join("fits.csv"),
        "subject,method,converged,objective,cl_l_h,cl_l_h_se,v_l,v_l_se\n\
         S1,map,true,1,2.5,0.1,40,2\nS2,map,true,1,3.5,0.1,60,2\nS3,map,false,1,4.5,0.1,50,2\n\
         S4,map,true,1,4.5,0.1,50,2\nS5,map,true,1,6,0.1,45,2\n",
    )
    .unwrap();
    let ran = ok(
        dir,
        &[
            "sweep",
            "--params",
            "fits.csv",
            "--amounts",
            "1g",
            "--every",
            "12h",
            "--durations",
            "1h",
            "--target",
            "auc24=400..600",
            "--max-trough",
            "15",
            "--format",
            "csv",
        ],
    );
    assert!(ran.stderr.contains("left out 1 subjects whose fit did not converge: S3"), "{}", ran.stderr);
    let mut reader = csv::Reader::from_reader(ran.stdout.as_bytes());
    let row = reader.records().next().unwrap().unwrap();
    // AUC24 = 2000 mg / CL: 800, 571.4, 444.4 and 333.3 mg·h/L, so 2 of 4 are in the window.
    assert_eq!((&row[6], &row[7]), ("4", "0.5"));
    // Steady-state trough of a 1-h infusion every 12 h (common practice, no source):
    // R/(kV)·(1 − e^(−kT))·e^(−k(τ − T)) / (1 − e^(−kτ)) with R = 1000 mg/h, T = 1 h.
    let trough = |cl: f64, v: f64| {
        let k = cl / v;
        1000.0 / cl * (1.0 - (-k).exp()) * (-k * 11.0).exp() / (1.0 - (-k * 12.0).exp())
    };
    let over = [(2.5, 40.0), (3.5, 60.0), (4.5, 50.0), (6.0, 45.0)]
        .iter()
        .filter(|(c, v)| trough(*c, *v) > 15.0)
        .count();
    assert!(over > 0 && over < 4, "the case separates the subjects ({over} over)");
    assert_eq!(row[9].parse::<f64>().unwrap(), over as f64 / 4.0, "p_over_trough");
    // At least one subject in four is above the limit: more than the default --max-risk 0.1.
    let reason = format!("trough above 15 mg/L in {:.1} % of subjects", 25.0 * over as f64);
    assert!(row[11].starts_with(&reason), "exposure_limits_broken: '{}'", &row[11]);
}

/// One bad command line: what it must say.
struct Bad {
    args: String,
    says: &'static str,
}

fn bad(args: &str, says: &'static str) -> Bad {
    Bad { args: args.into(), says }
}

/// Every case runs beside the workspace's files; `-o out.csv` is appended.
#[rustfmt::skip] // one case per line reads as a table
fn catalog() -> Vec<Bad> {
    let base = "sweep --model model.toml --covariates pool.csv --subjects 100";
    let grid = "--amounts 1g --every 12h --durations 1h --target auc24=400..600";
    let with = |rest: &str| format!("{base} {rest}");
    let model = |rest: &str| format!("sweep --model model.toml {rest}");
    vec![
        // The candidate grid, the targets and the limits.
        bad(&with("--amounts 1g --durations 1h --target auc24=400..600"), "--every: the candidate grid needs the dosing intervals to try"),
        bad(&with("--amounts , --every 12h --durations 1h --target auc24=1.."), "--amounts: the list ',' is empty"),
        bad(&with("--amounts 3g..1g/250 --every 12h --durations 1h --target auc24=1.."), "--amounts: expected LO..HI/STEP"),
        bad(&with("--amounts 1g --every 12h --durations 13h --target auc24=1.."), "no candidate fits"),
        bad(&with("--amounts 1g --every 12h --target auc24=1.."), "infusions need their durations"),
        bad(&with("--amounts 1g --every 12h --durations 1h"), "--target: give at least one target"),
        bad(&with("--amounts 1g --every 12h --durations 1h --target trough=20..10"), "--target: the lower bound is above the upper bound"),
        bad(&with(&format!("{grid} --max-trough 30 --max-peak 20")), "the limits contradict each other"),
        bad(&with("--amounts 1g --every 12h --durations 1h --target trough=25.. --max-trough 20"), "--target: the target trough=25.. asks for more than the highest trough allowed (20 mg/L)"),
        bad(&with(&format!("{grid} --max-rate 10")), "--max-rate: give the rate with its unit"),
        // Shards.
        bad(&with(&format!("{grid} --shard 5/4")), "--shard: the shard I must be between 1 and N = 4"),
        bad(&with(&format!("{grid} --shard 0/4")), "--shard: the shard I must be between 1 and N = 4"),
        bad(&with(&format!("{grid} --shard 1/0")), "--shard: the number of shards N must be at least 1"),
        bad(&with(&format!("{grid} --shard a/b")), "--shard: expected I/N with whole numbers"),
        bad(&with(&format!("{grid} --shard 2/4 --format csv")), "--format: a shard writes its state as JSON"),
        bad(&with(&format!("{grid} --per-subject out.csv")), "--per-subject: 'out.csv' is also where -o writes ('out.csv'); give each output its own file"),
        // The population.
        bad(&model(&format!("--subjects 100 {grid}")), "the model uses the covariates crcl_ml_min, weight_kg"),
        bad(&model(&format!("{grid} --draw weight_kg=70")), "--subjects: give the number of subjects"),
        bad(&model(&format!("--subjects 0 {grid} --draw weight_kg=70")), "--subjects: expected at least 1"),
        bad(&model(&format!("--subjects 10 {grid} --draw weight_kg=70")), "--draw: 'crcl_ml_min' is not given"),
        bad(&model(&format!("--subjects 10 {grid} --draw weight_kg=normal:70")), "--draw: 'normal' takes 2 parameters"),
        bad("sweep --model plain.toml --subjects 10 --amounts 500 --every 8h --route oral --target auc24=1..", "plain.toml: oral candidates need an [absorption] table"),
        bad(&format!("sweep --params pool.csv {grid}"), "pool.csv: line 1: a parameters file needs a clearance column"),
        bad(&format!("sweep --params /dev/zero {grid}"), "/dev/zero: this is a device, not a file"),
        bad(&format!("sweep --model model.toml --params pool.csv {grid}"), "cannot be used with"),
    ]
}

#[test]
fn bad_input_exits_2_with_a_clear_message() {
    let ws = workspace();
    let dir = ws.path();
    for case in &catalog() {
        let mut a: Vec<&str> = case.args.split_whitespace().collect();
        a.extend(["-o", "out.csv"]);
        let ran = cistern(dir, &a);
        assert_eq!(ran.code, 2, "{}: exit {}\n{}", case.args, ran.code, ran.stderr);
        assert!(
            ran.stderr.contains(case.says),
            "{}\nshould say '{}', said:\n{}",
            case.args,
            case.says,
            ran.stderr
        );
        assert!(!ran.stderr.contains("panicked"), "{}: {}", case.args, ran.stderr);
        assert!(ran.stdout.is_empty() && !dir.join("out.csv").exists(), "{}: output written", case.args);
    }
}
