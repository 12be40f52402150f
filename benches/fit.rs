//! Fitter speed: one sparse subject with Laplace intervals, and a study of sparse subjects with
//! posterior intervals on all cores.
//!
//! Run with `cargo bench --bench fit`; docs/performance.md records the figures. Targets from
//! the fitter's issue: median ≤ 50 µs per sparse subject (Laplace, one core) and 10,000
//! subjects with posterior intervals in under 10 s on two cores.

use cistern::covariates::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::fit::{FitOptions, Intervals, SubjectData, fit_all, fit_subject};
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use std::hint::black_box;
use std::time::{Duration, Instant};

const MODEL: &str = include_str!("../tests/fixtures/plain_model.toml");

/// A sparse subject: `doses` 1-h infusions every 12 h with some irregularity, and 2–4 levels
/// around the last interval (invented benchmark data).
fn subject(i: usize) -> SubjectData {
    let n_doses = 4 + i % 17;
    let doses: Vec<Dose> = (0..n_doses)
        .map(|d| Dose {
            time_h: d as f64 * 12.0 + ((d * 37 + i) % 5) as f64 * 0.25,
            amount_mg: 750.0 + ((i + d) % 3) as f64 * 250.0,
            route: Route::Infusion,
            duration_h: 1.0,
        })
        .collect();
    let last = doses[n_doses - 1].time_h;
    let n_levels = 2 + i % 3;
    let levels = (0..n_levels)
        .map(|l| Level {
            time_h: last - 0.5 + l as f64 * 3.5,
            conc_mg_l: Some(8.0 + ((i * 13 + l * 7) % 20) as f64),
            lloq_mg_l: None,
            line: 0,
        })
        .collect();
    SubjectData { id: Some(format!("S{i}")), doses, levels, covariates: Covariates::default() }
}

/// The target is a median per subject, which criterion's per-iteration statistics over a
/// batch of different subjects do not give: time each subject fit on its own, five times over.
fn median_per_subject(subjects: &[SubjectData], model: &PopulationModel, options: &FitOptions) {
    let mut times: Vec<f64> = Vec::new();
    for _ in 0..5 {
        for s in subjects {
            let start = Instant::now();
            black_box(fit_subject(s, Some(model), options, 1).ok());
            times.push(start.elapsed().as_secs_f64() * 1e6);
        }
    }
    times.sort_by(f64::total_cmp);
    let q = |p: f64| times[((times.len() - 1) as f64 * p).round() as usize];
    println!(
        "fit/map_laplace per sparse subject, one core: median {:.1} µs, 10th percentile {:.1} µs, 90th percentile {:.1} µs",
        q(0.5),
        q(0.1),
        q(0.9)
    );
}

fn benches(c: &mut Criterion) {
    let model = PopulationModel::parse(&TomlText::new("bench.toml", MODEL)).expect("model");
    let laplace = FitOptions { intervals: Intervals::Laplace, ..FitOptions::default() };
    let subjects: Vec<SubjectData> = (0..64).map(subject).collect();
    median_per_subject(&subjects, &model, &laplace);
    let mut g = c.benchmark_group("fit");
    g.sample_size(20).measurement_time(Duration::from_secs(5));
    g.throughput(Throughput::Elements(subjects.len() as u64));
    g.bench_function("map_laplace_64_sparse_subjects_one_core", |b| {
        b.iter(|| {
            for s in &subjects {
                black_box(fit_subject(s, Some(&model), &laplace, 1).ok());
            }
        })
    });
    let posterior = FitOptions::default();
    g.bench_function("map_posterior_64_sparse_subjects_one_core", |b| {
        b.iter(|| {
            for s in &subjects {
                black_box(fit_subject(s, Some(&model), &posterior, 1).ok());
            }
        })
    });
    g.finish();

    let study: Vec<SubjectData> = (0..10_000).map(subject).collect();
    let mut g = c.benchmark_group("study");
    g.sample_size(10).measurement_time(Duration::from_secs(20));
    g.throughput(Throughput::Elements(study.len() as u64));
    g.bench_function("map_posterior_10000_subjects_all_cores", |b| {
        b.iter(|| black_box(fit_all(&study, Some(&model), &posterior).len()))
    });
    g.finish();
}

criterion_group!(fit, benches);
criterion_main!(fit);
