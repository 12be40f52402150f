//! The next-sample advisor: a case whose answer is known, and its predicted narrowing of the
//! 90 % interval against a brute-force simulation of the extra level.
//!
//! The subject (invented data of a fictional drug): three 1 g infusions over 1 h every 12 h
//! and one trough drawn just before the fourth dose; the planned regimen continues the same
//! doses. The exposure the target is on is AUC24 = daily dose / CL (exact identity,
//! reference case 10), so it depends on clearance alone.
//!
//! Why a peak must beat another trough (common practice, no source): one trough constrains a
//! combination of CL and V, and the posterior of (ln CL, ln V) is a ridge along which that
//! trough stays the same. A second trough measures nearly the same combination again, so it
//! barely moves along the ridge; a level at the end of the infusion depends mostly on V and
//! cuts across the ridge, which pins CL down — and with it AUC24.

use crate::common;

use cistern::covariates::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::engine::{self, Params};
use cistern::fit::{FitOptions, FitResult, Intervals, Method, SubjectData, fit_subject};
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use cistern::plan::advisor::{Advice, Question, advise};
use rand::distr::Distribution;
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use serde_json::Value;
use statrs::distribution::Normal;

/// Invented population model: CL 4 L/h (CV 30 %), V 50 L (CV 25 %), correlated 0.3;
/// residual error 0.5 mg/L + 10 %.
const MODEL: &str = include_str!("../fixtures/plain_model.toml");

/// The invented trough: 6.4 mg/L half an hour before the fourth dose.
const TROUGH: Level = Level { time_h: 35.5, conc_mg_l: Some(6.4), lloq_mg_l: None, line: 0 };

/// Candidate sampling times in the next interval: the end of the infusion (the peak) and a
/// trough just before the following dose.
const PEAK_TIME: f64 = 37.0;
const TROUGH_TIME: f64 = 47.9;

/// Posterior draws the fit keeps, and importance-sampling draws behind them.
const DRAWS: usize = 2000;

fn model() -> PopulationModel {
    PopulationModel::parse(&TomlText::new("model.toml", MODEL)).expect("the model parses")
}

/// `count` infusions of 1 g over 1 h every 12 h from time 0.
fn infusions(count: usize) -> Vec<Dose> {
    (0..count)
        .map(|i| Dose { time_h: 12.0 * i as f64, amount_mg: 1000.0, route: Route::Infusion, duration_h: 1.0 })
        .collect()
}

/// The planned course: the three doses given and the regimen continued at 36 h and 48 h.
fn planned() -> Vec<Dose> {
    infusions(5)
}

/// AUC24 of 1 g every 12 h = 2000 mg / CL (case 10's identity).
fn auc24(p: &Params) -> f64 {
    2000.0 / p.cl_l_h
}

/// MAP fit with posterior draws, as `cistern plan` does it.
fn fit(model: &PopulationModel, levels: Vec<Level>, seed: u64) -> FitResult {
    let subject = SubjectData { id: None, doses: planned(), levels, covariates: Covariates::default() };
    let options = FitOptions {
        method: Method::Map,
        intervals: Intervals::Posterior,
        draws: DRAWS,
        keep_draws: DRAWS,
        seed,
        ..FitOptions::default()
    };
    fit_subject(&subject, Some(model), &options, seed).expect("the subject fits")
}

fn advice(model: &PopulationModel, draws: &[Params], simulations: usize, seed: u64) -> Advice {
    let exposure: Vec<f64> = draws.iter().map(auc24).collect();
    advise(&Question {
        draws,
        exposure: &exposure,
        exposure_name: "auc24_mg_h_l",
        doses: &planned(),
        times: &[PEAK_TIME, TROUGH_TIME],
        residual: model.residual,
        simulations,
        seed,
    })
}

/// The advisor's value for the time `t`.
fn at(advice: &Advice, t: f64) -> cistern::plan::advisor::SampleValue {
    *advice.times.iter().find(|s| (s.time_h - t).abs() < 1e-12).expect("the time was assessed")
}

/// Mean and standard error of the mean.
fn mean_se(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

/// Width of the 5–95 % interval of `values` (the lower empirical quantile at each end, as
/// the advisor takes it: the first value whose cumulative share reaches 5 % and 95 %).
fn ci90_width(mut values: Vec<f64>) -> f64 {
    values.sort_by(f64::total_cmp);
    let n = values.len();
    let q = |p: f64| values[((p * n as f64).ceil() as usize).clamp(1, n) - 1];
    q(0.95) - q(0.05)
}

/// (a) The known answer, at the command's own number of simulated levels (200).
#[test]
fn after_a_lone_trough_a_peak_level_narrows_auc24_more_than_another_trough() {
    let model = model();
    let current = fit(&model, vec![TROUGH], 7);
    let a = advice(&model, &current.draws, 200, 1);
    let (peak, trough) = (at(&a, PEAK_TIME), at(&a, TROUGH_TIME));
    assert!(
        peak.interval_narrowing_pct > trough.interval_narrowing_pct + 10.0,
        "a peak level should narrow AUC24 more: peak {:.1} %, trough {:.1} %",
        peak.interval_narrowing_pct,
        trough.interval_narrowing_pct
    );
    assert!((a.times[0].time_h - PEAK_TIME).abs() < 1e-12, "the peak is ranked first");
    // Both narrow it (one more level never widens the posterior on average) and neither
    // can remove the uncertainty altogether.
    assert!(trough.interval_narrowing_pct > 0.0 && peak.interval_narrowing_pct < 100.0);
}

/// (a) through the command: with only a trough drawn and an AUC24 target, the best time the
/// plan suggests lies early in a dosing interval, and it beats every time at the end of one.
#[test]
fn the_command_suggests_a_level_early_in_the_interval() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("model.toml"), MODEL).unwrap();
    std::fs::write(
        d.join("doses.csv"),
        "# invented\ntime_h,amount_mg,route,duration_h\n0,1000,infusion,1\n12,1000,infusion,1\n24,1000,infusion,1\n",
    )
    .unwrap();
    std::fs::write(d.join("levels.csv"), "# invented\ntime_h,conc_mg_l\n35.5,6.4\n").unwrap();
    let ran = common::cistern_at(
        d,
        &[
            "plan",
            "--model",
            "model.toml",
            "--doses",
            "doses.csv",
            "--levels",
            "levels.csv",
            "--target",
            "auc24=400..600",
            "--amounts",
            "1000",
            "--every",
            "12h",
            "--durations",
            "1h",
            "--format",
            "json",
        ],
        "0",
    );
    assert_eq!(ran.code, 0, "{}", ran.stderr);
    let doc: Value = serde_json::from_str(&ran.stdout).unwrap();
    let times = doc["next_level"]["times"].as_array().expect("next-level advice");
    let after = |s: &Value| s["after_dose_h"].as_f64().unwrap();
    let shrink = |s: &Value| s["interval_narrowing_pct"].as_f64().unwrap();
    assert!(after(&times[0]) <= 4.0, "best time {} h after a dose", after(&times[0]));
    let late_best = times.iter().filter(|s| after(s) > 11.0).map(shrink).fold(f64::NEG_INFINITY, f64::max);
    assert!(late_best.is_finite(), "the end of an interval was assessed");
    assert!(shrink(&times[0]) > late_best + 10.0, "{} % against {late_best} %", shrink(&times[0]));
}

/// (b) The predicted narrowing against brute force. For each time, M extra levels are drawn
/// from the posterior predictive (a random current draw θ, y = f(θ, t) + ε with the model's
/// residual error), the subject is refitted from scratch with the extra level (MAP + fresh
/// importance-sampled posterior, `fit_subject`), and the 90 % interval width and variance of
/// AUC24 over the refit's draws are averaged. The advisor reweights the current draws instead
/// of refitting; both estimate the same preposterior expectation, so they must agree within
/// Monte-Carlo error.
///
/// The advisor's error has two parts: its simulated levels, and the finite set of current
/// draws it is handed (their 90 % width and variance are themselves estimates, a few per cent
/// off with 2000 draws, and every answer inherits that). So it is run R times, each on the
/// draws of an independent fit of the current data (own seed) with its own simulation seed,
/// and its standard error is the spread of the R answers over √R. The brute force's standard
/// error is the spread of its M widths over √M. Tolerance: four combined standard errors (a
/// false alarm about once in 16,000).
#[test]
fn predicted_narrowing_agrees_with_refitting_simulated_levels() {
    const M: usize = 4000;
    const RUNS: u64 = 64;
    const SIMULATIONS: usize = 1000;
    let model = model();
    let currents: Vec<FitResult> = (0..RUNS).map(|r| fit(&model, vec![TROUGH], 7 + r)).collect();
    let runs: Vec<Advice> =
        currents.iter().zip(100..).map(|(c, seed)| advice(&model, &c.draws, SIMULATIONS, seed)).collect();
    let pooled: Vec<Params> = currents.iter().flat_map(|c| c.draws.iter().copied()).collect();
    let normal = Normal::new(0.0, 1.0).unwrap();
    let mut rng = StdRng::seed_from_u64(20_240_611);
    for t in [PEAK_TIME, TROUGH_TIME] {
        let (mut widths, mut variances) = (Vec::with_capacity(M), Vec::with_capacity(M));
        for i in 0..M {
            let theta = pooled[rng.random_range(0..pooled.len())];
            let f = engine::concentrations(&theta, &planned(), &[t])[0];
            let y = f + model.residual.variance(f).sqrt() * normal.sample(&mut rng);
            assert!(y > 0.0, "a simulated level of {y} mg/L");
            let extra = Level { time_h: t, conc_mg_l: Some(y), lloq_mg_l: None, line: 0 };
            let refit = fit(&model, vec![TROUGH, extra], 1000 + i as u64);
            let exposure: Vec<f64> = refit.draws.iter().map(auc24).collect();
            let (mean, _) = mean_se(&exposure);
            variances.push(exposure.iter().map(|m| (m - mean).powi(2)).sum::<f64>() / exposure.len() as f64);
            widths.push(ci90_width(exposure));
        }
        let now = mean_se(&runs.iter().map(|a| a.current_ci90_width).collect::<Vec<_>>()).0;
        for (what, brute, advised) in [
            ("90 % width", &widths, runs.iter().map(|a| at(a, t).expected_ci90_width).collect::<Vec<_>>()),
            // The expected posterior variance is the advisor's expected_sd squared.
            ("variance", &variances, runs.iter().map(|a| at(a, t).expected_sd.powi(2)).collect()),
        ] {
            let (brute_mean, brute_se) = mean_se(brute);
            let (advised_mean, advised_se) = mean_se(&advised);
            let tol = 4.0 * (brute_se.powi(2) + advised_se.powi(2)).sqrt();
            println!(
                "t = {t} h, {what}: advisor {advised_mean:.3} ± {advised_se:.3}, \
                 refits {brute_mean:.3} ± {brute_se:.3}"
            );
            assert!(
                (advised_mean - brute_mean).abs() <= tol,
                "t = {t} h: expected {what} {advised_mean} (advisor) against {brute_mean} (refits), \
                 tolerance {tol}"
            );
        }
        // The narrowing is real, far beyond the noise.
        let (brute_width, brute_se) = mean_se(&widths);
        println!("t = {t} h: 90 % width now {now:.3}");
        assert!(now - brute_width > 10.0 * brute_se);
    }
}
