//! Engine speed: long dose histories at a million time points, and steady-state metrics.
//!
//! Run with `cargo bench --bench engine`; docs/performance.md records the figures and the
//! machine. The simulation cost should grow with doses + times, not doses × times, so the
//! 10,000-dose case must take far less than twice the 5,000-dose case.

use cistern::dosing::{Dose, Regimen, Route};
use cistern::engine::steady::SteadyCurve;
use cistern::engine::{self, Params};
use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use std::hint::black_box;
use std::time::Duration;

/// Time points per simulation.
const TIMES: usize = 1_000_000;
/// Span covered by both the doses and the times (h): 5,000 doses every 6 h.
const SPAN_H: f64 = 30_000.0;

/// The same mild-mannered parameters as the demo, with oral absorption.
fn params() -> Params {
    Params { cl_l_h: 4.2, v_l: 48.0, ka_per_h: Some(1.1), f: 0.9, tlag_h: 0.25 }
}

/// `n` doses spread over `SPAN_H` at irregular times, cycling through infusion (some long
/// enough to overlap the next dose), bolus and oral, with varying amounts.
fn history(n: usize) -> Vec<Dose> {
    let every = SPAN_H / n as f64;
    (0..n)
        .map(|i| {
            // A fixed, deterministic jitter of up to ±20 % of the interval.
            let jitter = ((i * 7919) % 1000) as f64 / 1000.0 - 0.5;
            let time_h = i as f64 * every + 0.4 * every * jitter;
            let amount_mg = 250.0 + ((i * 31) % 8) as f64 * 125.0;
            match i % 3 {
                0 => Dose {
                    time_h,
                    amount_mg,
                    route: Route::Infusion,
                    duration_h: every * (0.2 + (i % 7) as f64 * 0.2),
                },
                1 => Dose { time_h, amount_mg, route: Route::Bolus, duration_h: 0.0 },
                _ => Dose { time_h, amount_mg, route: Route::Oral, duration_h: 0.0 },
            }
        })
        .collect()
}

fn simulate(c: &mut Criterion) {
    let p = params();
    let times: Vec<f64> = (0..TIMES).map(|i| i as f64 * SPAN_H / TIMES as f64).collect();
    let mut group = c.benchmark_group("simulate_1M_times");
    group.sample_size(10).warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(5));
    group.throughput(Throughput::Elements(TIMES as u64));
    for n in [5_000, 10_000] {
        let doses = history(n);
        p.validate(&doses).expect("the benchmark history is valid");
        group.bench_with_input(BenchmarkId::new("doses", n), &doses, |b, doses| {
            b.iter(|| engine::concentrations(black_box(&p), black_box(doses), black_box(&times)))
        });
    }
    group.finish();
}

/// A uniform grid (the `--times` of `cistern simulate`): oral doses every 12 h at 1,000,000
/// points 0.05 h apart, where the walker reuses one step from point to point.
fn uniform_grid(c: &mut Criterion) {
    let p = params();
    let step = 0.05;
    let times: Vec<f64> = (0..TIMES).map(|i| i as f64 * step).collect();
    let doses: Vec<Dose> = (0..TIMES)
        .step_by(240)
        .map(|i| Dose { time_h: i as f64 * step, amount_mg: 500.0, route: Route::Oral, duration_h: 0.0 })
        .collect();
    p.validate(&doses).expect("the benchmark history is valid");
    let mut group = c.benchmark_group("simulate_1M_grid_points");
    group.sample_size(10).warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(5));
    group.throughput(Throughput::Elements(TIMES as u64));
    group.bench_function("oral_every_12h", |b| {
        b.iter(|| engine::concentrations(black_box(&p), black_box(&doses), black_box(&times)))
    });
    group.finish();
}

fn steady_state(c: &mut Criterion) {
    let p = params();
    let regimens = [
        ("infusion", Regimen { amount_mg: 1000.0, route: Route::Infusion, duration_h: 1.0, every_h: 12.0 }),
        ("bolus", Regimen { amount_mg: 1000.0, route: Route::Bolus, duration_h: 0.0, every_h: 12.0 }),
        ("oral", Regimen { amount_mg: 500.0, route: Route::Oral, duration_h: 0.0, every_h: 8.0 }),
    ];
    let mut group = c.benchmark_group("steady_state_metrics");
    group.sample_size(10).warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(2));
    for (name, dose) in regimens {
        group.bench_with_input(BenchmarkId::from_parameter(name), &dose, |b, &dose| {
            b.iter(|| SteadyCurve::new(black_box(&p), black_box(dose)).map(|s| s.metrics()))
        });
    }
    group.finish();
}

criterion_group!(benches, simulate, uniform_grid, steady_state);
criterion_main!(benches);
