//! `cistern plan`: predictions, probabilities, ranking, limits and loading doses, checked
//! against other commands, exact identities and a published target window.
//!
//! Most checks plan from a saved fit written by hand, whose posterior draws are chosen so the
//! answer is known in advance: all draws identical (the plan's median must equal the single
//! parameter set's exposure), or split between two clearances (probabilities must be exact
//! shares of the draws). The dose histories, parameters and regimens are invented (a
//! fictional drug); the one published value is the AUC24 window of the 2020 consensus
//! guideline, used as a check value only.

use crate::common::{
    Ran, assert_abs, assert_published, assert_rel, cistern_at, demo_args, demo_copy, save_demo_fit,
};
use cistern::dosing::{Regimen, Route};
use cistern::engine::Params;
use cistern::engine::steady::SteadyCurve;
use cistern::plan::targets::{Limits, parse_target};
use cistern::plan::{Course, evaluate};
use serde_json::{Value, json};
use std::path::Path;

/// Run `cistern ARGS` with `dir` as the working directory (the fixed creation time that
/// `cistern_at` sets matters to reports only).
fn cistern(dir: &Path, args: &[&str]) -> Ran {
    cistern_at(dir, args, "0")
}

/// Run with `--format json` and insist on success.
fn json_of(dir: &Path, args: &[&str]) -> Value {
    let mut all = args.to_vec();
    all.extend(["--format", "json"]);
    let ran = cistern(dir, &all);
    assert_eq!(ran.code, 0, "cistern {all:?} failed:\n{}", ran.stderr);
    serde_json::from_str(&ran.stdout).unwrap_or_else(|e| panic!("not JSON ({e}):\n{}", ran.stdout))
}

fn tempdir() -> tempfile::TempDir {
    tempfile::tempdir().expect("a temporary directory")
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("{v} is not a number"))
}

/// Equal up to rounding: amounts, intervals and probabilities here are exact by
/// construction (parsed from short decimals, or shares of a few hundred draws).
fn same(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-12 * a.abs().max(b.abs()).max(1.0)
}

/// Panics unless `c` (a candidate or the recommendation) is `amount` mg every `every` h.
#[track_caller]
fn assert_regimen(c: &Value, amount: f64, every: f64) {
    let (a, e) = (num(&c["amount_mg"]), num(&c["every_h"]));
    assert!(same(a, amount) && same(e, every), "{a} mg every {e} h, expected {amount} mg every {every} h");
}

/// A saved fit of one unnamed subject (doses without a subject column) as `cistern fit
/// --format json` writes it (the fields planning reads): the point estimate `point`, the
/// residual error model and the posterior `draws`.
fn write_fit(dir: &Path, point: Params, draws: &[Params]) {
    let doc = json!({
        "subjects": [{
            "subject": null,
            "parameters": point,
            "residual": {"additive_mg_l": 0.5, "proportional_cv": 0.1},
            "draws": draws,
        }],
    });
    std::fs::write(dir.join("fit.json"), doc.to_string()).expect("write fit.json");
}

/// One dose row: time (h), amount (mg), route, infusion duration (h).
type Row = (f64, f64, Route, f64);

/// A doses CSV in the documented format; `{}` prints each f64 so that it reads back exactly.
fn doses_csv(rows: &[Row]) -> String {
    let mut text = String::from("time_h,amount_mg,route,duration_h\n");
    for (t, amount, route, duration) in rows {
        text += &format!("{t},{amount},{route},{duration}\n");
    }
    text
}

/// The candidates of a plan whose regimen is (amount, every, duration).
fn find(plan: &Value, amount: f64, every: f64, duration: f64) -> &Value {
    plan["candidates"]
        .as_array()
        .expect("candidates")
        .iter()
        .find(|c| {
            (num(&c["amount_mg"]) - amount).abs() < 1e-9
                && (num(&c["every_h"]) - every).abs() < 1e-9
                && (num(&c["duration_h"]) - duration).abs() < 1e-9
        })
        .unwrap_or_else(|| panic!("no candidate {amount} mg every {every} h over {duration} h"))
}

const FIT_PLAN: [&str; 6] = ["plan", "--fit", "fit.json", "--doses", "doses.csv", "--no-advice"];

/// A plan from `fit.json` and `doses.csv` in `dir`, with `extra` flags.
fn plan_of(dir: &Path, extra: &[&str]) -> Value {
    let args: Vec<&str> = FIT_PLAN.iter().chain(extra).copied().collect();
    json_of(dir, &args)
}

/// `n` copies of the same parameters.
fn identical(p: Params, n: usize) -> Vec<Params> {
    vec![p; n]
}

// ---------------------------------------------------------------------------------------------
// 1. Consistency with `cistern exposure` and `cistern simulate`
// ---------------------------------------------------------------------------------------------

/// With every posterior draw the same, the plan's median, 5th and 95th percentiles of peak,
/// trough and AUC24 are that parameter set's steady state, which `cistern exposure` reports
/// independently of the plan's code path (one regimen given by flags). Rounding in the two
/// paths may differ only in the last bits: 1e-12 relative.
#[test]
fn plan_predictions_equal_exposure_for_every_route() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    // Invented parameters with awkward digits, oral ones with a lag longer than some intervals.
    let iv = Params::iv(3.7, 41.3);
    let oral = Params { cl_l_h: 3.7, v_l: 41.3, ka_per_h: Some(0.93), f: 0.85, tlag_h: 6.5 };
    let cases: [(&str, Params, &[&str], &[f64]); 3] = [
        ("infusion", iv, &["--durations", "1h,150min"], &[1.0, 2.5]),
        ("bolus", iv, &[], &[0.0]),
        ("oral", oral, &[], &[0.0]),
    ];
    let mut compared = 0;
    for (route, p, durations, duration_list) in cases {
        write_fit(d, p, &identical(p, 150));
        let mut extra = vec!["--target", "auc24=1..", "--amounts", "500,1250", "--every", "6h,12h"];
        extra.extend(["--route", route]);
        extra.extend(durations);
        let plan = plan_of(d, &extra);
        for amount in [500.0, 1250.0] {
            for every in [6.0, 12.0] {
                for &duration in duration_list {
                    let c = find(&plan, amount, every, duration);
                    let (cl, v, ka, f, tlag) = (p.cl_l_h, p.v_l, p.ka_per_h.unwrap_or(1.0), p.f, p.tlag_h);
                    let mut args = vec![
                        "exposure".to_string(),
                        format!("--dose={amount}"),
                        format!("--every={every}"),
                        format!("--route={route}"),
                        format!("--cl={cl}"),
                        format!("--v={v}"),
                    ];
                    if route == "infusion" {
                        args.push(format!("--duration={duration}"));
                    }
                    if route == "oral" {
                        args.extend([format!("--ka={ka}"), format!("--f={f}"), format!("--tlag={tlag}")]);
                    }
                    let args: Vec<&str> = args.iter().map(String::as_str).collect();
                    let exposure = json_of(d, &args);
                    let ss = &exposure["steady_state"];
                    for (key, band) in [
                        ("peak_mg_l", "peak_mg_l"),
                        ("trough_mg_l", "trough_mg_l"),
                        ("auc24_mg_h_l", "auc24_mg_h_l"),
                    ] {
                        for stat in ["median", "p05", "p95"] {
                            let what =
                                format!("{route} {amount} mg q{every}h over {duration} h: {band}.{stat}");
                            assert_rel(num(&c["predicted"][band][stat]), num(&ss[key]), 1e-12, 1e-300, &what);
                        }
                    }
                    compared += 1;
                }
            }
        }
    }
    assert_eq!(compared, 16, "every candidate of the three grids was compared");
}

/// The doses a candidate adds to the history: from `start` every `every` hours while before
/// `until` (the definition of continuing the real history with the new regimen).
fn continued(history: &[Row], start: f64, c: Row, every: f64, until: f64) -> Vec<Row> {
    let mut rows = history.to_vec();
    let mut t = start;
    while t < until {
        rows.push((t, c.1, c.2, c.3));
        t += every;
    }
    rows
}

/// One way of continuing the history: route, parameters, `--start` (none for the default),
/// infusion durations, and where the new regimen must then start (h).
struct Continuation {
    route: &'static str,
    p: Params,
    start: Option<&'static str>,
    durations: &'static [f64],
    expected_start: f64,
}

/// An AUC over day N of therapy continues the real history with the candidate regimen. The
/// check: write that whole history (given doses + the candidate's doses) as a doses CSV and
/// ask `cistern simulate` for the exact AUC over the day; the plan's value for every candidate
/// must be the same number (all draws identical, so the median is the value).
#[test]
fn auc_over_a_day_of_therapy_continues_the_history_like_simulate() {
    let dir = tempdir();
    let d = dir.path();
    // Invented history: two 1 g infusions, a late 750 mg one, then the new regimen.
    let history: Vec<Row> = vec![
        (0.0, 1000.0, Route::Infusion, 1.0),
        (12.0, 1000.0, Route::Infusion, 1.0),
        (23.5, 750.0, Route::Infusion, 1.0),
    ];
    std::fs::write(d.join("doses.csv"), doses_csv(&history)).unwrap();
    let iv = Params::iv(4.2, 48.0);
    let oral = Params { cl_l_h: 4.2, v_l: 48.0, ka_per_h: Some(1.1), f: 0.9, tlag_h: 0.75 };
    let cases = [
        Continuation {
            route: "infusion",
            p: iv,
            start: Some("30h"),
            durations: &[1.0, 2.0],
            expected_start: 30.0,
        },
        // Default start: one interval (23.5 − 12 h) after the last dose.
        Continuation { route: "infusion", p: iv, start: None, durations: &[1.0], expected_start: 35.0 },
        Continuation {
            route: "oral",
            p: oral,
            start: Some("1830min"),
            durations: &[0.0],
            expected_start: 30.5,
        },
    ];
    for Continuation { route, p, start, durations, expected_start } in cases {
        write_fit(d, p, &identical(p, 120));
        let dur_text: Vec<String> = durations.iter().map(|x| format!("{x}h")).collect();
        let dur_text = dur_text.join(",");
        let mut extra = vec![
            "--target",
            "auc_day2=1..",
            "--target",
            "auc_day3=1..",
            "--amounts",
            "750,1250",
            "--every",
            "8h,12h",
            "--route",
            route,
        ];
        if route == "infusion" {
            extra.extend(["--durations", &dur_text]);
        }
        if let Some(s) = start {
            extra.extend(["--start", s]);
        }
        let plan = plan_of(d, &extra);
        let start_h = num(&plan["start_h"]);
        assert_abs(start_h, expected_start, 1e-12, "start of the new regimen");
        for amount in [750.0, 1250.0] {
            for every in [8.0, 12.0] {
                for &duration in durations {
                    let c = find(&plan, amount, every, duration);
                    let route_of = Route::parse(route).unwrap();
                    let rows = continued(&history, start_h, (0.0, amount, route_of, duration), every, 72.0);
                    std::fs::write(d.join("course.csv"), doses_csv(&rows)).unwrap();
                    for (i, day) in [2u32, 3].into_iter().enumerate() {
                        let (from, to) = (24.0 * f64::from(day - 1), 24.0 * f64::from(day));
                        let times = format!("{from}:{to}:1");
                        let (cl, v) = (format!("--cl={}", p.cl_l_h), format!("--v={}", p.v_l));
                        let mut args = vec!["simulate", "--doses", "course.csv", &cl, &v, "--times", &times];
                        let (ka, f, tlag) = (
                            format!("--ka={}", p.ka_per_h.unwrap_or(1.0)),
                            format!("--f={}", p.f),
                            format!("--tlag={}", p.tlag_h),
                        );
                        if route == "oral" {
                            args.extend([ka.as_str(), &f, &tlag]);
                        }
                        let sim = json_of(d, &args);
                        let s = &sim["subjects"][0];
                        assert_abs(num(&s["auc_from_h"]), from, 0.0, "simulated span start");
                        assert_abs(num(&s["auc_to_h"]), to, 0.0, "simulated span end");
                        let what = format!("{route} {amount} mg q{every}h over {duration} h: AUC day {day}");
                        assert_rel(
                            num(&c["target_values"][i]["median"]),
                            num(&s["auc_mg_h_l"]),
                            1e-12,
                            1e-300,
                            &what,
                        );
                    }
                }
            }
        }
    }
}

// ---------------------------------------------------------------------------------------------
// 2. A published target window as a check value
// ---------------------------------------------------------------------------------------------

/// Draws sharing one clearance but with volumes spread from 20 to 80 L (invented).
fn known_clearance(cl: f64) -> Vec<Params> {
    (0..200).map(|i| Params::iv(cl, 20.0 + 60.0 * f64::from(i) / 199.0)).collect()
}

/// The grid of the ranking checks: 500–3000 mg in 250 mg steps every 8, 12 or 24 h over 1 h.
const GRID: [&str; 6] = ["--amounts", "500..3000/250", "--every", "8h,12h,24h", "--durations", "1h"];

/// The AUC24 window 400–600 mg·h/L of the vancomycin consensus guideline (printed: Rybak MJ et
/// al., Am J Health-Syst Pharm 2020;77(11):835–864, assuming MIC 1 mg/L; reference case 10).
/// At steady state AUC24 = daily dose / CL exactly, whatever V is (derived identity, case 10),
/// so with CL known (4 L/h) every draw has the same AUC24 and each candidate's PTA is exactly
/// 1 when 1600 ≤ daily dose ≤ 2400 mg and exactly 0 otherwise — known before the plan runs.
/// No candidate of the grid lies within 6 % of an edge, so rounding cannot flip one.
#[test]
fn published_auc24_window_gives_the_known_attainment() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    let draws = known_clearance(4.0);
    write_fit(d, draws[100], &draws);
    let mut extra = vec!["--target", "auc24=400..600"];
    extra.extend(GRID);
    let plan = plan_of(d, &extra);
    let candidates = plan["candidates"].as_array().unwrap();
    assert_eq!(candidates.len(), 11 * 3);
    let mut attaining = 0;
    for c in candidates {
        let daily = num(&c["amount_mg"]) * 24.0 / num(&c["every_h"]);
        let auc24 = daily / 4.0;
        let expected = if (400.0..=600.0).contains(&auc24) { 1.0 } else { 0.0 };
        attaining += usize::from(expected > 0.5);
        assert_abs(num(&c["pta"]), expected, 0.0, &format!("PTA at {daily} mg/day"));
        for stat in ["p05", "median", "p95"] {
            assert_rel(num(&c["predicted"]["auc24_mg_h_l"][stat]), auc24, 1e-12, 1.0, "AUC24 = daily/CL");
        }
    }
    // 1750, 2000, 2250 q24h; 1000 q12h; 750 q8h.
    assert_eq!(attaining, 5);
    // The printed example of case 10: 1000 mg every 12 h with CL 4 L/h gives 500 mg·h/L.
    assert_published(
        num(&find(&plan, 1000.0, 12.0, 1.0)["predicted"]["auc24_mg_h_l"]["median"]),
        "steady-state AUC24, 1000 mg every 12 h, CL 4 L/h",
        "case 10",
    );
}

// ---------------------------------------------------------------------------------------------
// 3. Ranking, limits, probabilities, loading doses
// ---------------------------------------------------------------------------------------------

/// The key of each candidate in plan order: (amount, every, PTA, daily dose).
fn ranked(plan: &Value) -> Vec<(f64, f64, f64, f64)> {
    plan["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| (num(&c["amount_mg"]), num(&c["every_h"]), num(&c["pta"]), num(&c["daily_mg"])))
        .collect()
}

/// Ranking is by PTA, then the lower daily dose, then the longer interval. With the window of
/// the previous test and half the draws at CL 4 L/h, half at 5.2 L/h (AUC24 = daily/CL), a
/// draw at CL 4 meets 400–600 when 1600 ≤ daily ≤ 2400 mg and one at CL 5.2 when 2080 ≤
/// daily ≤ 3120 mg (no candidate within 4 % of an edge), so the order follows by hand.
#[test]
fn candidates_rank_by_attainment_then_daily_dose_then_interval() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    let draws: Vec<Params> = known_clearance(4.0).into_iter().chain(known_clearance(5.2)).collect();
    write_fit(d, draws[0], &draws);
    let mut extra = vec!["--target", "auc24=400..600"];
    extra.extend(GRID);
    let plan = plan_of(d, &extra);
    let order = ranked(&plan);
    // PTA 1 (2080–2400 mg/day): 2250 q24h, then 750 q8h (same daily dose, shorter interval).
    // PTA 0.5 from the lowest daily dose: 1750 q24h; 2000 q24h before 1000 q12h; 2500 q24h
    // before 1250 q12h.
    let top = [
        (2250.0, 24.0, 1.0),
        (750.0, 8.0, 1.0),
        (1750.0, 24.0, 0.5),
        (2000.0, 24.0, 0.5),
        (1000.0, 12.0, 0.5),
        (2500.0, 24.0, 0.5),
        (1250.0, 12.0, 0.5),
    ];
    for (i, (&got, want)) in order.iter().zip(top).enumerate() {
        let ok = same(got.0, want.0) && same(got.1, want.1) && same(got.2, want.2);
        assert!(ok, "rank {}: {got:?}, expected {want:?}", i + 1);
    }
    for w in order.windows(2) {
        let (a, b) = (w[0], w[1]);
        let in_order = (a.2 > b.2 && !same(a.2, b.2))
            || (same(a.2, b.2) && ((a.3 < b.3 && !same(a.3, b.3)) || (same(a.3, b.3) && a.1 + 1e-12 >= b.1)));
        assert!(in_order, "{a:?} is ranked before {b:?}");
    }
    let r = &plan["recommended"];
    assert_regimen(r, 2250.0, 24.0);
}

/// Dose limits that a candidate breaks by itself, checked independently for each candidate.
fn breaks(amount: f64, every: f64, duration: f64) -> Vec<&'static str> {
    let mut why = Vec::new();
    if amount > 1500.0 {
        why.push("single dose");
    }
    if amount * 24.0 / every > 3000.0 {
        why.push("daily dose");
    }
    // 25 mg/min = 1500 mg/h.
    if amount / duration > 1500.0 {
        why.push("infusion rate");
    }
    if every < 12.0 {
        why.push("interval");
    }
    why
}

/// A candidate that breaks a dose limit (single dose, daily dose, infusion rate, shortest
/// interval) is never recommended and says which limit and why; the recommendation is the
/// best-ranked candidate that breaks none.
#[test]
fn candidates_breaking_a_dose_limit_say_why_and_are_never_recommended() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    let draws = known_clearance(4.0);
    write_fit(d, draws[0], &draws);
    let plan = plan_of(
        d,
        &[
            "--target",
            "auc24=400..600",
            "--amounts",
            "500..3000/250",
            "--every",
            "8h,12h,24h",
            "--durations",
            "1h,2h",
            "--max-dose",
            "1.5g",
            "--max-daily",
            "3000mg",
            "--max-rate",
            "25mg/min",
            "--min-every",
            "12h",
        ],
    );
    let mut first_acceptable = None;
    for c in plan["candidates"].as_array().unwrap() {
        let (amount, every, duration) = (num(&c["amount_mg"]), num(&c["every_h"]), num(&c["duration_h"]));
        let expected = breaks(amount, every, duration);
        let listed: Vec<&str> =
            c["limits_broken"].as_array().unwrap().iter().map(|m| m.as_str().unwrap()).collect();
        assert_eq!(listed.len(), expected.len(), "{amount} mg q{every}h over {duration} h: {listed:?}");
        for (why, text) in expected.iter().zip(&listed) {
            assert!(text.contains(why), "'{text}' should be about the {why}");
        }
        if expected.is_empty() && first_acceptable.is_none() {
            first_acceptable = Some((amount, every, duration));
        }
    }
    // Attaining and acceptable: 1000 mg q12h (1 h or 2 h; the 1 h one is listed first by the
    // grid). Every attaining q24h candidate is above 1500 mg and every q8h one too short.
    let r = &plan["recommended"];
    let (amount, every, duration) = first_acceptable.expect("an acceptable candidate");
    assert_regimen(r, amount, every);
    assert_abs(num(&r["duration_h"]), duration, 1e-12, "duration of the recommendation");
    assert_regimen(r, 1000.0, 12.0);
    assert!(r["limits_broken"].as_array().unwrap().is_empty());
    assert_abs(num(&r["pta"]), 1.0, 0.0, "PTA of the recommendation");
}

/// When no candidate respects the limits, nothing is recommended and a note says so.
#[test]
fn nothing_is_recommended_when_every_candidate_breaks_a_limit() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    let draws = known_clearance(4.0);
    write_fit(d, draws[0], &draws);
    let mut extra = vec!["--target", "auc24=400..600", "--max-dose", "400mg"];
    extra.extend(GRID);
    let plan = plan_of(d, &extra);
    assert!(plan["recommended"].is_null(), "{}", plan["recommended"]);
    let notes: Vec<&str> = plan["notes"].as_array().unwrap().iter().map(|n| n.as_str().unwrap()).collect();
    assert!(notes.iter().any(|n| n.contains("nothing is recommended")), "{notes:?}");
    for c in plan["candidates"].as_array().unwrap() {
        assert!(!c["limits_broken"].as_array().unwrap().is_empty());
    }
}

/// Half of the draws CL 3 L/h and half CL 6 L/h, V 50 L (invented): the probabilities are
/// shares of the draws, so they are exact. 1200 mg every 12 h gives AUC24 = 2400/CL = 800 or
/// 400 mg·h/L (case 10's identity) and Cavg = AUC24/24 = 33.3 or 16.7 mg/L.
fn split_draws(with_cl3: usize, with_cl6: usize) -> Vec<Params> {
    let mut draws = vec![Params::iv(3.0, 50.0); with_cl3];
    draws.extend(vec![Params::iv(6.0, 50.0); with_cl6]);
    draws
}

const SPLIT_GRID: [&str; 6] = ["--amounts", "1200", "--every", "12h", "--route", "bolus"];

#[test]
fn attainment_is_the_share_of_draws_meeting_every_target() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    for (cl3, cl6, expected) in [(100, 100, 0.5), (150, 50, 0.75), (1, 199, 0.005)] {
        let draws = split_draws(cl3, cl6);
        write_fit(d, draws[0], &draws);
        let mut extra = vec!["--target", "auc24=700..900"];
        extra.extend(SPLIT_GRID);
        let plan = plan_of(d, &extra);
        let c = &plan["candidates"][0];
        assert_abs(
            num(&c["pta"]),
            expected,
            1e-15,
            &format!("PTA with {cl3} of {} draws at CL 3", cl3 + cl6),
        );
    }
    // Each target alone is met by one half; together by no draw: PTA is the joint share, not
    // the product of the marginal ones (which would be 0.25).
    let draws = split_draws(100, 100);
    write_fit(d, draws[0], &draws);
    for (targets, expected) in [
        (vec!["auc24=700..900"], 0.5),
        (vec!["cavg=..20"], 0.5),
        (vec!["auc24=700..900", "cavg=..20"], 0.0),
        (vec!["auc24=300..900", "cavg=10..40"], 1.0),
    ] {
        let mut extra: Vec<&str> = targets.iter().flat_map(|t| ["--target", t]).collect();
        extra.extend(SPLIT_GRID);
        let plan = plan_of(d, &extra);
        assert_abs(num(&plan["candidates"][0]["pta"]), expected, 1e-15, &format!("PTA of {targets:?}"));
    }
}

/// Exposure limits: a candidate breaks one when P(exceeding it) > --max-risk. With the split
/// draws and bolus doses the steady-state peak is (D/V)/(1 − e^(−kτ)) and the trough
/// peak·e^(−kτ) (accumulation ratio, reference case 12, common practice); limits between the
/// two halves' values are exceeded by exactly half the draws.
#[test]
fn exposure_limits_are_broken_when_the_risk_is_above_the_accepted_one() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    let draws = split_draws(100, 100);
    write_fit(d, draws[0], &draws);
    let peak = |cl: f64| 1200.0 / 50.0 / -(-(cl / 50.0) * 12.0f64).exp_m1();
    let trough = |cl: f64| peak(cl) * (-(cl / 50.0) * 12.0f64).exp();
    let (peak_hi, peak_lo, trough_hi, trough_lo) = (peak(3.0), peak(6.0), trough(3.0), trough(6.0));
    assert!(peak_hi > 40.0 && peak_lo < 40.0 && trough_hi > 15.0 && trough_lo < 15.0);
    for (risk, broken) in [("0.1", true), ("0.49", true), ("0.5", false)] {
        let mut extra = vec![
            "--target",
            "auc24=300..900",
            "--max-peak",
            "40",
            "--max-trough",
            "15mg/l",
            "--max-risk",
            risk,
        ];
        extra.extend(SPLIT_GRID);
        let plan = plan_of(d, &extra);
        let c = &plan["candidates"][0];
        assert_abs(num(&c["p_over_peak"]), 0.5, 1e-15, "P(peak > 40 mg/L)");
        assert_abs(num(&c["p_over_trough"]), 0.5, 1e-15, "P(trough > 15 mg/L)");
        // The band of the predictions spans the two halves.
        let band = &c["predicted"];
        assert_rel(num(&band["peak_mg_l"]["p05"]), peak_lo, 1e-12, 1.0, "peak p05");
        assert_rel(num(&band["peak_mg_l"]["p95"]), peak_hi, 1e-12, 1.0, "peak p95");
        assert_rel(num(&band["trough_mg_l"]["p05"]), trough_lo, 1e-12, 1.0, "trough p05");
        assert_rel(num(&band["trough_mg_l"]["p95"]), trough_hi, 1e-12, 1.0, "trough p95");
        let listed: Vec<&str> =
            c["limits_broken"].as_array().unwrap().iter().map(|m| m.as_str().unwrap()).collect();
        if broken {
            assert_eq!(listed.len(), 2, "{listed:?}");
            assert!(listed[0].contains("50 %") && listed[0].contains("peak"), "{}", listed[0]);
            assert!(listed[1].contains("50 %") && listed[1].contains("trough"), "{}", listed[1]);
            assert!(plan["recommended"].is_null());
        } else {
            assert!(listed.is_empty(), "{listed:?}");
            assert_abs(num(&plan["recommended"]["amount_mg"]), 1200.0, 0.0, "recommended");
        }
    }
}

/// Concentration of `duration`-hour infusions of `amounts[i]` at `i·every` from no
/// drug, by the closed form C = R/(kV)(1 − e^(−kT))e^(−k(t−T)) after an infusion and
/// R/(kV)(1 − e^(−kt)) during it (Bourne notes, ch. 6; reference case 4), superposed.
fn infusion_conc(amounts: &[f64], every: f64, duration: f64, cl: f64, v: f64, t: f64) -> f64 {
    let k = cl / v;
    amounts
        .iter()
        .enumerate()
        .map(|(i, &amount)| {
            let s = t - i as f64 * every;
            let rate = amount / duration;
            if s <= 0.0 {
                0.0
            } else if s <= duration {
                rate / cl * -(-k * s).exp_m1()
            } else {
                rate / cl * -(-k * duration).exp_m1() * (-k * (s - duration)).exp()
            }
        })
        .sum()
}

/// Hours until one whole interval has AUC24 (= AUC_τ·24/τ) in [lo, hi], from no drug. The AUC
/// of interval j comes from mass balance, CL·AUC = dose in − change in the body's amount
/// (exact identity), with the amounts from the closed form above.
fn hours_to_window(
    first: f64,
    amount: f64,
    every: f64,
    duration: f64,
    cl: f64,
    v: f64,
    window: (f64, f64),
) -> f64 {
    let amounts: Vec<f64> = (0..50).map(|i| if i == 0 { first } else { amount }).collect();
    for j in 0..49 {
        let (t0, t1) = (j as f64 * every, (j + 1) as f64 * every);
        let change = v
            * (infusion_conc(&amounts, every, duration, cl, v, t1)
                - infusion_conc(&amounts, every, duration, cl, v, t0));
        let auc24 = (amounts[j] - change) / cl * 24.0 / every;
        if (window.0..=window.1).contains(&auc24) {
            return t1;
        }
    }
    panic!("the window is never reached");
}

/// The loading dose is maintenance × 1/(1 − e^(−kτ)) (accumulation ratio, reference case 12,
/// common practice) rounded up to the grid's amount step (250 mg here), capped by --max-dose
/// and by what the rate limit lets the infusion deliver, and offered only when it reaches the
/// targets sooner. The times to target are known from the closed form. The history is a
/// single 1 mg dose 1000 h before the new regimen (washed out: e^(−80) of it remains).
#[test]
fn loading_dose_is_offered_only_when_it_reaches_the_targets_sooner() {
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1.0, Route::Bolus, 0.0)])).unwrap();
    let base = [
        "--target",
        "auc24=400..600",
        "--amounts",
        "1500..2000/250",
        "--every",
        "24h",
        "--durations",
        "1h",
        "--start",
        "1000h",
    ];
    let window = (400.0, 600.0);
    // CL 4 L/h, V 50 L: k = 0.08/h, ratio 1/(1 − e^(−1.92)) = 1.1717; 1750 mg (the lowest
    // attaining daily dose) × 1.1717 = 2050 → 2250 mg.
    let p = Params::iv(4.0, 50.0);
    write_fit(d, p, &identical(p, 100));
    let ratio = 1.0 / -(-0.08f64 * 24.0).exp_m1();
    let loading = (1750.0 * ratio / 250.0).ceil() * 250.0;
    assert_abs(loading, 2250.0, 0.0, "the loading dose worked by hand");
    let without = hours_to_window(1750.0, 1750.0, 24.0, 1.0, 4.0, 50.0, window);
    for (limit, expected_loading) in [
        (vec![], loading),
        (vec!["--max-dose", "2g"], 2000.0),
        // 35 mg/min = 2100 mg/h: over 1 h the infusion can give 2100 mg, and the loading
        // dose stays on the 250 mg steps, 2000 mg.
        (vec!["--max-rate", "35mg/min"], 2000.0),
    ] {
        let extra: Vec<&str> = base.iter().copied().chain(limit.iter().copied()).collect();
        let plan = plan_of(d, &extra);
        let r = &plan["recommended"];
        assert_regimen(r, 1750.0, 24.0);
        let with = hours_to_window(expected_loading, 1750.0, 24.0, 1.0, 4.0, 50.0, window);
        assert!(with < without, "the loading dose helps: {with} h against {without} h");
        assert_abs(num(&r["loading_dose_mg"]), expected_loading, 0.0, &format!("loading dose {limit:?}"));
        assert_abs(num(&r["time_to_target_h"]), without, 0.0, "time to target without loading");
        assert_abs(num(&r["time_to_target_with_loading_h"]), with, 0.0, "time to target with loading");
    }
    // V 20 L: k = 0.2/h, the first interval already meets the window (AUC24 ≈ 434); the
    // loading dose 1750 × 1.0083 → 2000 mg would not reach it sooner, so none is offered.
    let p = Params::iv(4.0, 20.0);
    write_fit(d, p, &identical(p, 100));
    let plan = plan_of(d, &base);
    let r = &plan["recommended"];
    assert_abs(hours_to_window(1750.0, 1750.0, 24.0, 1.0, 4.0, 20.0, window), 24.0, 0.0, "hand check");
    assert_abs(num(&r["time_to_target_h"]), 24.0, 0.0, "time to target");
    assert!(r["loading_dose_mg"].is_null() && r["time_to_target_with_loading_h"].is_null(), "{r}");
}

// ---------------------------------------------------------------------------------------------
// 4. Time above a threshold against brute force
// ---------------------------------------------------------------------------------------------

/// Points of the brute-force sampling of one interval.
const SAMPLES: usize = 200_000;

/// The share of the steady-state interval with `lo ≤ C ≤ hi`, by the midpoint rule on the
/// curve read off with `SteadyCurve::at`. Each crossing of an edge misplaces at most one
/// sample, so the error is at most (number of crossings)/SAMPLES.
fn brute_share(curve: &SteadyCurve, every: f64, lo: f64, hi: f64) -> f64 {
    let inside = (0..SAMPLES)
        .filter(|&i| {
            let c = curve.at(every * (i as f64 + 0.5) / SAMPLES as f64);
            c >= lo && c <= hi
        })
        .count();
    inside as f64 / SAMPLES as f64
}

/// Invented regimens: bolus, a 2-h infusion, an infusion lasting the whole interval (constant
/// level), oral with a lag, oral with a lag longer than the interval, and oral with
/// absorption slower than elimination (flip-flop).
fn regimens() -> Vec<(&'static str, Params, Regimen)> {
    let dose = |amount_mg, route, duration_h, every_h| Regimen { amount_mg, route, duration_h, every_h };
    let oral = |ka: f64, tlag_h: f64| Params { cl_l_h: 4.2, v_l: 48.0, ka_per_h: Some(ka), f: 0.8, tlag_h };
    vec![
        ("bolus", Params::iv(4.2, 48.0), dose(1000.0, Route::Bolus, 0.0, 12.0)),
        ("infusion 2 h", Params::iv(4.2, 48.0), dose(1000.0, Route::Infusion, 2.0, 12.0)),
        ("infusion = interval", Params::iv(4.2, 48.0), dose(800.0, Route::Infusion, 8.0, 8.0)),
        ("oral, lag 0.75 h", oral(1.2, 0.75), dose(500.0, Route::Oral, 0.0, 8.0)),
        ("oral, lag 10 h", oral(1.2, 10.0), dose(500.0, Route::Oral, 0.0, 8.0)),
        ("oral, flip-flop", oral(0.03, 0.5), dose(500.0, Route::Oral, 0.0, 24.0)),
    ]
}

/// `share_above` (the `above=` target) against dense sampling, for thresholds below the
/// trough, at fractions between trough and peak, and above the peak.
#[test]
fn time_above_a_threshold_matches_dense_sampling() {
    for (name, p, dose) in regimens() {
        let curve = SteadyCurve::new(&p, dose).unwrap();
        let m = curve.metrics();
        let (lo, hi) = (m.exposure.trough_mg_l, m.exposure.peak_mg_l);
        let mut thresholds = vec![0.5 * lo, 1.5 * hi];
        if hi - lo > 1e-9 * hi {
            thresholds.extend([0.02, 0.1, 0.3, 0.5, 0.7, 0.9, 0.98].map(|x| lo + x * (hi - lo)));
        }
        for th in thresholds {
            let brute = brute_share(&curve, dose.every_h, th, f64::INFINITY);
            let tol = 2.0 / SAMPLES as f64 + 1e-12;
            assert_abs(curve.share_above(th), brute, tol, &format!("{name}: share above {th} mg/L"));
        }
        if name == "infusion = interval" {
            assert_rel(lo, hi, 1e-12, 1.0, "a back-to-back infusion holds a constant level");
            assert_rel(lo, 800.0 / 8.0 / 4.2, 1e-12, 1.0, "the plateau is rate/CL (case 12)");
        }
    }
}

/// The `above=LO..HI@P%` target's value is the share (%) of the interval with the level in
/// the window, through the library's evaluation and through the command.
#[test]
fn time_in_a_window_matches_dense_sampling_in_the_plan() {
    for (name, p, dose) in regimens() {
        let curve = SteadyCurve::new(&p, dose).unwrap();
        let m = curve.metrics();
        let (lo, hi) = (m.exposure.trough_mg_l, m.exposure.peak_mg_l);
        // A constant level (an infusion lasting the whole interval) lies inside a wide window.
        let window = if hi - lo > 1e-9 * hi {
            (lo + 0.25 * (hi - lo), lo + 0.75 * (hi - lo))
        } else {
            (0.5 * lo, 2.0 * hi)
        };
        let target = parse_target(&format!("above={}..{}@50%", window.0, window.1)).unwrap();
        let candidate = Regimen {
            amount_mg: dose.amount_mg,
            every_h: dose.every_h,
            duration_h: dose.duration_h,
            route: dose.route,
        };
        let e = evaluate(&p, &candidate, &[target], &Limits::default(), &Course::fresh(), None).unwrap();
        let brute = brute_share(&curve, dose.every_h, window.0, window.1);
        assert_abs(
            e.values[0],
            100.0 * brute,
            100.0 * (4.0 / SAMPLES as f64 + 1e-12),
            &format!("{name}: window"),
        );
        assert_eq!(e.meets, e.values[0] >= 50.0, "{name}: met when at least 50 % of the interval");
    }
    // Through the command: a 2-h infusion, the share of the interval at 10–20 mg/L.
    let dir = tempdir();
    let d = dir.path();
    std::fs::write(d.join("doses.csv"), doses_csv(&[(0.0, 1000.0, Route::Infusion, 1.0)])).unwrap();
    let (_, p, dose) = regimens()[1];
    write_fit(d, p, &identical(p, 100));
    let plan = plan_of(
        d,
        &["--target", "above=10mg/l..20mg/l@40%", "--amounts", "1000", "--every", "12h", "--durations", "2h"],
    );
    let curve = SteadyCurve::new(&p, dose).unwrap();
    let brute = 100.0 * brute_share(&curve, 12.0, 10.0, 20.0);
    let value = num(&plan["candidates"][0]["target_values"][0]["median"]);
    assert_abs(value, brute, 100.0 * 4.0 / SAMPLES as f64, "command: % of the interval at 10–20 mg/L");
    assert_abs(num(&plan["candidates"][0]["pta"]), if brute >= 40.0 { 1.0 } else { 0.0 }, 0.0, "PTA");
}

// ---------------------------------------------------------------------------------------------
// 6. Bad input
// ---------------------------------------------------------------------------------------------

/// A grid that is fine, to which each case adds or replaces one thing.
const GOOD: [&str; 10] = [
    "--target",
    "auc24=400..600",
    "--amounts",
    "500..2000/250",
    "--every",
    "8h,12h",
    "--durations",
    "1h",
    "--subject",
    "P01",
];

/// Each bad input ends with exit code 2, a message on stderr that says what is wrong, no
/// panic, and nothing written with -o.
#[test]
fn bad_input_is_refused_with_exit_code_2_and_nothing_written() {
    let dir = demo_copy();
    let d = dir.path();
    let p = Params::iv(4.0, 50.0);
    // A saved fit without draws, one with two subjects, and a malformed one.
    let no_draws = json!({"subjects": [{"subject": "P01", "parameters": p}]});
    std::fs::write(d.join("nodraws.json"), no_draws.to_string()).unwrap();
    let two = json!({"subjects": [
        {"subject": "P01", "parameters": p, "draws": [p, p]},
        {"subject": "P02", "parameters": p, "draws": [p, p]},
    ]});
    std::fs::write(d.join("two.json"), two.to_string()).unwrap();
    std::fs::write(
        d.join("broken.json"),
        "{\"subjects\": [\n  {\"subject\": \"P01\",\n   \"parameters\": 4\n",
    )
    .unwrap();
    let with = |replace: &[(&str, &str)], add: &[&str]| -> Vec<String> {
        let mut args: Vec<String> = demo_args("plan", &[]).iter().map(|s| s.to_string()).collect();
        let mut good: Vec<String> = GOOD.iter().map(|s| s.to_string()).collect();
        for (flag, value) in replace {
            let at = good.iter().position(|g| g == flag).expect("a flag of GOOD");
            if value.is_empty() {
                good.drain(at..at + 2);
            } else {
                good[at + 1] = value.to_string();
            }
        }
        args.extend(good);
        args.extend(add.iter().map(|s| s.to_string()));
        args
    };
    let from_fit = |fit: &str, add: &[&str]| -> Vec<String> {
        let mut args: Vec<String> =
            ["plan", "--fit", fit, "--doses", "doses.csv"].iter().map(|s| s.to_string()).collect();
        args.extend(GOOD.iter().map(|s| s.to_string()));
        args.extend(add.iter().map(|s| s.to_string()));
        args
    };
    let cases: Vec<(&str, Vec<String>, &str)> = vec![
        ("empty amounts", with(&[("--amounts", " ")], &[]), "--amounts: the list ' ' is empty"),
        ("empty intervals", with(&[("--every", ",")], &[]), "--every: the list ',' is empty"),
        (
            "amount range reversed",
            with(&[("--amounts", "2000..500/250")], &[]),
            "--amounts: expected LO..HI/STEP",
        ),
        (
            "no durations fit",
            with(&[("--durations", "13h")], &[]),
            "every infusion duration is longer than its interval",
        ),
        ("no target", with(&[("--target", "")], &[]), "--target: give at least one target"),
        (
            "lower above upper",
            with(&[("--target", "auc24=600..400")], &[]),
            "lower bound is above the upper bound",
        ),
        (
            "window above upper",
            with(&[("--target", "above=20..10@50%")], &[]),
            "lower bound is above the upper bound",
        ),
        (
            "max trough above max peak",
            with(&[], &["--max-trough", "30", "--max-peak", "20"]),
            "--max-trough: the highest trough (30 mg/L) is above the highest peak (20 mg/L)",
        ),
        (
            "target trough above max trough",
            with(&[], &["--target", "trough=20..30", "--max-trough", "15"]),
            "--target: the target trough=20..30 asks for more than the highest trough allowed (15 mg/L)",
        ),
        (
            "risk of 1",
            with(&[], &["--max-risk", "1"]),
            "--max-risk: the largest acceptable risk must be in [0, 1)",
        ),
        ("unknown subject", with(&[("--subject", "P99")], &[]), "no subject 'P99'"),
        ("several subjects, none chosen", with(&[("--subject", "")], &[]), "--subject: the data hold"),
        (
            "unknown subject in a fit",
            from_fit("two.json", &[]).into_iter().map(|a| if a == "P01" { "P7".into() } else { a }).collect(),
            "no subject 'P7'",
        ),
        (
            "several subjects in a fit, none chosen",
            from_fit("two.json", &[]).into_iter().filter(|a| a != "--subject" && a != "P01").collect(),
            "--subject: the data hold",
        ),
        ("a fit without draws", from_fit("nodraws.json", &[]), "the fit has no posterior draws"),
        ("a malformed fit", from_fit("broken.json", &[]), "broken.json: line"),
        ("a fit that is not there", from_fit("missing.json", &[]), "missing.json: cannot read the file"),
    ];
    for (what, mut args, message) in cases {
        args.extend(["-o".into(), "out.json".into()]);
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let ran = cistern(d, &args);
        assert_eq!(ran.code, 2, "{what}: exit code; stderr:\n{}", ran.stderr);
        assert!(
            ran.stderr.contains("error: ") && ran.stderr.contains(message),
            "{what}: stderr:\n{}",
            ran.stderr
        );
        assert!(!ran.stderr.contains("panicked"), "{what}: {}", ran.stderr);
        assert!(ran.stdout.is_empty(), "{what}: stdout {}", ran.stdout);
        assert!(!d.join("out.json").exists(), "{what}: out.json was written");
    }
}

// ---------------------------------------------------------------------------------------------
// The three output formats carry the same plan
// ---------------------------------------------------------------------------------------------

/// CSV promises the shortest text that reads back as the same f64, so every number of every
/// row must equal the JSON's bit for bit; the table names the recommendation and carries the
/// caution. The demo scenario is invented.
#[test]
fn csv_json_and_table_carry_the_same_plan() {
    let dir = demo_copy();
    let d = dir.path();
    let mut args = demo_args("plan", &[]);
    args.extend(GOOD);
    args.extend(["--max-peak", "40mg/l"]);
    let json = json_of(d, &args);
    let mut csv_args = args.clone();
    csv_args.extend(["--format", "csv"]);
    let ran = cistern(d, &csv_args);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stderr.contains("caution: "), "the CSV's caution goes to stderr");
    let mut reader = csv::Reader::from_reader(ran.stdout.as_bytes());
    let header: Vec<String> = reader.headers().unwrap().iter().map(str::to_string).collect();
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    let candidates = json["candidates"].as_array().unwrap();
    assert_eq!(rows.len(), candidates.len());
    let column = |row: &csv::StringRecord, name: &str| -> String {
        row[header.iter().position(|h| h == name).unwrap_or_else(|| panic!("no column {name}"))].to_string()
    };
    for (i, (row, c)) in rows.iter().zip(candidates).enumerate() {
        assert_eq!(column(row, "rank"), (i + 1).to_string());
        let pairs = [
            ("amount_mg", &c["amount_mg"]),
            ("every_h", &c["every_h"]),
            ("pta", &c["pta"]),
            ("p_over_peak", &c["p_over_peak"]),
            ("peak_p05_mg_l", &c["predicted"]["peak_mg_l"]["p05"]),
            ("trough_p50_mg_l", &c["predicted"]["trough_mg_l"]["median"]),
            ("auc24_p95_mg_h_l", &c["predicted"]["auc24_mg_h_l"]["p95"]),
        ];
        for (name, value) in pairs {
            let text = column(row, name);
            let parsed: f64 = text.parse().unwrap_or_else(|_| panic!("{name} = '{text}'"));
            assert_eq!(parsed.to_bits(), num(value).to_bits(), "row {}: {name}", i + 1);
        }
        let broken: Vec<&str> =
            c["limits_broken"].as_array().unwrap().iter().map(|m| m.as_str().unwrap()).collect();
        assert_eq!(column(row, "limits_broken"), broken.join("; "));
    }
    let mut table_args = args.clone();
    table_args.extend(["--format", "table"]);
    let table = cistern(d, &table_args);
    assert_eq!(table.code, 0, "{}", table.stderr);
    let r = &json["recommended"];
    let regimen = format!("{} mg infusion over 1 h every {} h", num(&r["amount_mg"]), num(&r["every_h"]));
    assert!(table.stdout.contains(&format!("Recommended: {regimen}")), "{}", table.stdout);
    assert!(table.stdout.contains(cistern::io::output::CAUTION));
    assert!(json["caution"].as_str() == Some(cistern::io::output::CAUTION));
}

/// Planning from a saved fit (`cistern fit --keep-draws 2000 --format json`, then `cistern
/// plan --fit`) gives exactly the plan that fitting inside `cistern plan` gives: the same seed
/// draws the same posterior, and the saved numbers read back bit for bit.
#[test]
fn a_plan_from_a_saved_fit_equals_the_plan_from_the_levels() {
    let dir = demo_copy();
    let d = dir.path();
    save_demo_fit(d);
    let grid = ["--target", "trough=..15", "--max-peak", "60mg/l"];
    let mut direct: Vec<&str> = demo_args("plan", &[]);
    direct.extend(GOOD);
    direct.extend(grid);
    let mut saved: Vec<&str> = vec!["plan", "--fit", "fit.json", "--doses", "doses.csv"];
    saved.extend(GOOD);
    saved.extend(grid);
    assert_eq!(json_of(d, &saved), json_of(d, &direct));
}
