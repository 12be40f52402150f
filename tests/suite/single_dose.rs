//! One dose by flags: `simulate` and `exposure` without an interval (issue 10, "questions a
//! new user asks first"), run as real processes and checked against the closed forms of a
//! single dose in a one-compartment model (named at each check). The parameters are invented.

use crate::common::{Ran, assert_rel, cistern_at};
use serde_json::Value;

fn cistern(args: &[&str]) -> Ran {
    let dir = tempfile::tempdir().expect("a temporary directory");
    cistern_at(dir.path(), args, "0")
}

fn json(args: &[&str]) -> (Value, String) {
    let ran = cistern(args);
    assert_eq!(ran.code, 0, "cistern {args:?} failed:\n{}", ran.stderr);
    (serde_json::from_str(&ran.stdout).expect("JSON on stdout"), ran.stderr)
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn numbers(v: &Value) -> Vec<f64> {
    v.as_array().expect("an array").iter().map(num).collect()
}

/// Closed form of a zero-order infusion of `amount` over `duration` from no drug:
/// C = R/CL·(1 − e^(−kt)) while it runs, then C(T)·e^(−k(t − T)) (R = amount/duration).
fn infusion(amount: f64, duration: f64, cl: f64, v: f64, t: f64) -> f64 {
    let k = cl / v;
    let plateau = amount / duration / cl;
    if t <= duration {
        plateau * (1.0 - (-k * t).exp())
    } else {
        plateau * (1.0 - (-k * duration).exp()) * (-k * (t - duration)).exp()
    }
}

/// Closed form (Bateman function) of an oral dose: C = F·D·ka/(V·(ka − k))·(e^(−k t') −
/// e^(−ka t')), t' = t − tlag after the lag, 0 before.
fn oral(dose: f64, f: f64, ka: f64, tlag: f64, cl: f64, v: f64, t: f64) -> f64 {
    let k = cl / v;
    let s = (t - tlag).max(0.0);
    f * dose * ka / (v * (ka - k)) * ((-k * s).exp() - (-ka * s).exp())
}

/// `simulate` with one dose and no times used to demand --times, --every and --count. Now one
/// dose needs no interval and the times default to five half-lives after the dose ends,
/// stated on stderr; every value is the closed-form infusion curve.
#[test]
fn simulate_one_dose_needs_no_interval_nor_times() {
    let (doc, stderr) = json(&[
        "simulate",
        "--dose",
        "1g",
        "--route",
        "infusion",
        "--duration",
        "1h",
        "--cl",
        "4",
        "--v",
        "40",
        "--format",
        "json",
    ]);
    assert!(stderr.contains("five half-lives"), "the default grid is stated: {stderr}");
    let s = &doc["subjects"][0];
    let times = numbers(&s["time_h"]);
    let conc = numbers(&s["conc_mg_l"]);
    // Half-life ln 2/k with k = CL/V = 0.1 per hour; the grid ends at or after 1 h + 5 t½.
    let end = 1.0 + 5.0 * std::f64::consts::LN_2 / 0.1;
    assert!(times[0].abs() < 1e-15, "the grid starts at the dose, found {}", times[0]);
    let last = *times.last().unwrap();
    let step = times[1] - times[0];
    assert!(last >= end && last < end + step, "grid ends at {last}, expected just after {end}");
    assert!(times.len() <= 102, "about 100 points, found {}", times.len());
    for (t, c) in times.iter().zip(&conc) {
        assert_rel(*c, infusion(1000.0, 1.0, 4.0, 40.0, *t), 1e-10, 1e-9, &format!("C({t})"));
    }
}

/// Several doses still need their interval, and say so (exit code 2, the flag named).
#[test]
fn several_doses_without_an_interval_are_refused() {
    let ran =
        cistern(&["simulate", "--dose", "1g", "--route", "bolus", "--count", "3", "--cl", "4", "--v", "40"]);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("--every") && ran.stderr.contains("3 doses"), "{}", ran.stderr);
    assert!(ran.stdout.is_empty());
}

/// `exposure` without --every gives the single-dose metrics under
/// `single_dose.{cmax_mg_l, tmax_h, auc_inf_mg_h_l}`: for an oral dose, tmax = tlag +
/// ln(ka/k)/(ka − k) and Cmax the Bateman function there (closed forms), AUC from 0 to ∞ =
/// F·dose/CL (exact identity), and the levels asked with --at equal the Bateman function.
#[test]
fn exposure_of_one_oral_dose_matches_the_closed_forms() {
    let (dose, f, ka, tlag, cl, v): (f64, f64, f64, f64, f64, f64) = (500.0, 0.8, 1.1, 0.5, 4.2, 48.0);
    let (doc, _) = json(&[
        "exposure", "--dose", "500mg", "--route", "oral", "--ka", "1.1", "--f", "0.8", "--tlag", "30min",
        "--cl", "4.2", "--v", "48", "--at", "2h,12h", "--format", "json",
    ]);
    let s = &doc["single_dose"];
    let k = cl / v;
    let tmax = tlag + (ka / k).ln() / (ka - k);
    assert_rel(num(&s["tmax_h"]), tmax, 1e-10, 1e-9, "tmax = tlag + ln(ka/k)/(ka − k)");
    assert_rel(num(&s["cmax_mg_l"]), oral(dose, f, ka, tlag, cl, v, tmax), 1e-10, 1e-9, "Cmax");
    assert_rel(num(&s["auc_inf_mg_h_l"]), f * dose / cl, 1e-10, 1e-9, "AUC0–∞ = F·dose/CL");
    let at = s["at"].as_array().expect("the levels asked for");
    assert_eq!(at.len(), 2);
    for l in at {
        let t = num(&l["time_h"]);
        assert_rel(num(&l["conc_mg_l"]), oral(dose, f, ka, tlag, cl, v, t), 1e-10, 1e-9, &format!("C({t})"));
    }
    assert_eq!(doc["caution"].as_str(), Some(cistern::io::output::CAUTION));
    assert!(doc.get("steady_state").is_none(), "no steady state without an interval");
}

/// An infusion's peak is at its end: Cmax = R/CL·(1 − e^(−kT)), tmax = T (closed form); a
/// bolus peaks at once at dose/V. AUC from 0 to ∞ = dose/CL for both (exact identity).
#[test]
fn exposure_of_one_intravenous_dose_matches_the_closed_forms() {
    let (doc, _) = json(&[
        "exposure",
        "--dose",
        "1g",
        "--route",
        "infusion",
        "--duration",
        "2h",
        "--cl",
        "4",
        "--v",
        "40",
        "--format",
        "json",
    ]);
    let s = &doc["single_dose"];
    assert_rel(num(&s["tmax_h"]), 2.0, 1e-12, 1e-9, "tmax of an infusion is its end");
    assert_rel(
        num(&s["cmax_mg_l"]),
        infusion(1000.0, 2.0, 4.0, 40.0, 2.0),
        1e-10,
        1e-9,
        "Cmax of an infusion",
    );
    assert_rel(num(&s["auc_inf_mg_h_l"]), 1000.0 / 4.0, 1e-10, 1e-9, "AUC0–∞ = dose/CL");
    let (doc, _) =
        json(&["exposure", "--dose", "1g", "--route", "bolus", "--cl", "4", "--v", "40", "--format", "json"]);
    let s = &doc["single_dose"];
    assert_rel(num(&s["cmax_mg_l"]), 1000.0 / 40.0, 1e-12, 1e-9, "C0 = dose/V");
    assert_rel(num(&s["auc_inf_mg_h_l"]), 1000.0 / 4.0, 1e-10, 1e-9, "AUC0–∞ = dose/CL");
    // The table carries the same numbers and the caution.
    let ran = cistern(&[
        "exposure", "--dose", "1g", "--route", "bolus", "--cl", "4", "--v", "40", "--format", "table",
    ]);
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    assert!(ran.stdout.contains("auc_inf_mg_h_l") && ran.stdout.contains("250"), "{}", ran.stdout);
    assert!(ran.stdout.contains(cistern::io::output::CAUTION));
}
