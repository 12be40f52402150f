//! Planning speed: one subject, 2,000 posterior draws, 198 candidate regimens.
//!
//! Run with `cargo bench --bench plan`; docs/performance.md records the figures. The issue's
//! budget: `cistern plan` with 2,000 draws and 200 candidates answers in under 200 ms,
//! including the next-level advice. Measured: the whole of one subject's planning
//! (`plan_subject`: ranking plus the advice for the recommendation), the ranking alone
//! (`recommend::plan`), and the advisor alone, each with steady-state targets and with an
//! AUC over a day of therapy as well (which continues the dose history for every draw).

use cistern::dosing::{Dose, Regimen, Route};
use cistern::engine::Params;
use cistern::engine::steady::SteadyCurve;
use cistern::model::Residual;
use cistern::plan::Course;
use cistern::plan::advisor::{Question, advise};
use cistern::plan::candidates::{Durations, amount_step, grid, parse_amounts};
use cistern::plan::recommend::{PlanInput, plan};
use cistern::plan::session::{
    DEFAULT_SAMPLE_AFTER_H, Posterior, Record, Settings, plan_subject, sampling_times,
};
use cistern::plan::targets::{Limits, Target, parse_target};
use criterion::{Criterion, criterion_group, criterion_main};
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use statrs::distribution::Normal;
use std::hint::black_box;
use std::time::Duration;

const DRAWS: usize = 2000;

/// Invented posterior: ln CL ~ N(ln 4, 0.15²), ln V ~ N(ln 50, 0.12²), independent.
fn draws() -> Vec<Params> {
    let mut rng = StdRng::seed_from_u64(4);
    let z = Normal::new(0.0, 1.0).expect("standard normal");
    (0..DRAWS)
        .map(|_| {
            let cl = 4.0 * (0.15 * z.sample(&mut rng)).exp();
            let v = 50.0 * (0.12 * z.sample(&mut rng)).exp();
            Params::iv(cl, v)
        })
        .collect()
}

/// Invented history: four 1 g infusions over 1 h, a little irregular.
fn history() -> Vec<Dose> {
    [0.0, 12.25, 24.0, 36.5]
        .iter()
        .map(|&time_h| Dose { time_h, amount_mg: 1000.0, route: Route::Infusion, duration_h: 1.0 })
        .collect()
}

/// 11 amounts × 6 intervals × 3 durations = 198 candidates.
fn candidates() -> Vec<Regimen> {
    let amounts = parse_amounts("500..3000/250").expect("amounts");
    let every = [6.0, 8.0, 12.0, 24.0, 36.0, 48.0];
    let durations = Durations::Fixed(vec![1.0, 2.0, 3.0]);
    let c = grid(&amounts, &every, Route::Infusion, &durations).expect("grid");
    assert_eq!(c.len(), 198);
    c
}

fn targets(specs: &[&str]) -> Vec<Target> {
    specs.iter().map(|s| parse_target(s).expect("target")).collect()
}

const LIMITS: Limits = Limits {
    max_dose_mg: Some(2500.0),
    max_daily_mg: Some(6000.0),
    max_rate_mg_h: None,
    max_peak_mg_l: Some(60.0),
    max_trough_mg_l: Some(20.0),
    min_every_h: None,
    max_risk: 0.1,
};

const RESIDUAL: Residual = Residual { additive_mg_l: 0.5, proportional_cv: 0.1 };

fn benches(c: &mut Criterion) {
    let draws = draws();
    let history = history();
    let candidates = candidates();
    let posterior =
        Posterior { point: Params::iv(4.0, 50.0), draws: draws.clone(), residual: Some(RESIDUAL) };
    let course = Course { history: &history, start_h: 48.5, therapy_start_h: 0.0 };
    let record = Record { history: &history, last_level_h: None };
    let mut group = c.benchmark_group("plan_2000_draws_198_candidates");
    group.sample_size(20).measurement_time(Duration::from_secs(8));
    for (name, specs) in [
        ("steady_targets", &["auc24=400..600", "trough=..15"][..]),
        ("with_auc_day2", &["auc24=400..600", "trough=..15", "auc_day2=350.."][..]),
    ] {
        let targets = targets(specs);
        let settings = Settings {
            candidates: &candidates,
            targets: &targets,
            limits: LIMITS,
            start_h: Some(48.5),
            advise_on: None,
            advise_intervals: 2,
            sample_after_h: DEFAULT_SAMPLE_AFTER_H,
            seed: 1,
        };
        group.bench_function(format!("{name}/ranking_and_advice"), |b| {
            b.iter(|| plan_subject(black_box(&record), black_box(&posterior), &settings).expect("plan"))
        });
        let input = PlanInput {
            draws: &draws,
            point: posterior.point,
            course,
            candidates: &candidates,
            targets: &targets,
            limits: LIMITS,
            amount_step_mg: amount_step(&candidates),
        };
        group
            .bench_function(format!("{name}/ranking"), |b| b.iter(|| plan(black_box(&input)).expect("plan")));
    }
    // The advisor alone, for 1 g over 1 h every 12 h: 22 candidate times over two intervals,
    // 200 simulated levels each (what the command uses).
    let regimen = Regimen { amount_mg: 1000.0, every_h: 12.0, duration_h: 1.0, route: Route::Infusion };
    let exposure: Vec<f64> = draws
        .iter()
        .map(|p| SteadyCurve::new(p, regimen).expect("steady state").metrics().exposure.auc24_mg_h_l)
        .collect();
    let times = sampling_times(&regimen, 48.5, 2, regimen.duration_h + DEFAULT_SAMPLE_AFTER_H);
    let doses = course.continued(&regimen, None, 48.5 + 36.0);
    let question = Question {
        draws: &draws,
        exposure: &exposure,
        exposure_name: "auc24_mg_h_l",
        doses: &doses,
        times: &times,
        residual: RESIDUAL,
        simulations: 200,
        seed: 1,
    };
    group.bench_function(format!("advisor_alone/{}_times", times.len()), |b| {
        b.iter(|| advise(black_box(&question)))
    });
    group.finish();
}

criterion_group!(plan_benches, benches);
criterion_main!(plan_benches);
