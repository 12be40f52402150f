//! Sweep speed: 100 candidate regimens (one-hour infusions) over 10,000 virtual subjects
//! (1,000,000 subject-regimen evaluations) including the summary CSV, with and without the
//! 1,000,000 per-subject rows; and over 100,000 subjects on one thread and on two.
//!
//! Run with `cargo bench --bench sweep` (RAYON_NUM_THREADS sets the cores of the first group;
//! the second builds its own pools); docs/performance.md records the figures. Targets: under
//! 1 s for 10,000 subjects on two cores (the sweep's issue); at most 150 ns per
//! subject-regimen on one thread, summary included (issue 14). `scripts/sweep-vs-numpy.py`
//! puts the binary beside a vectorised numpy script of the same closed forms.

use cistern::dosing::Route;
use cistern::io::output::Format;
use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use cistern::plan::candidates::{Durations, grid};
use cistern::plan::targets::{Limits, parse_target};
use cistern::sweep::Sweep;
use cistern::sweep::population::{CovariateSource, Population, parse_draw};
use cistern::sweep::state::{Setup, Shard, SweepState};
use cistern::sweep::summary::Summary;
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use std::time::Duration;

/// An invented model: CL scaled by creatinine clearance, V by weight, as in the demo.
const MODEL: &str = include_str!("../tests/fixtures/covariate_model.toml");

const SUBJECTS: u64 = 10_000;

/// Subjects of the single- and two-thread group (10,000,000 evaluations).
const MANY: u64 = 100_000;

fn sweep(c: &mut Criterion) {
    let model = PopulationModel::parse(&TomlText::new("model.toml", MODEL)).expect("the model parses");
    // Covariates drawn per subject, crcl_ml_min derived by Cockcroft–Gault.
    let draws =
        ["weight_kg=normal:75:12:40..150", "age_y=uniform:30:85", "scr_mg_dl=lognormal:1:0.3", "sex=F:0.5"]
            .iter()
            .map(|d| parse_draw(d).expect("a valid draw"))
            .collect();
    let population = Population::from_model(model, CovariateSource::Draws(draws)).expect("a population");
    // 20 amounts × 5 intervals, 1-h infusions: 100 regimens.
    let amounts: Vec<f64> = (1..=20).map(|i| 250.0 * f64::from(i)).collect();
    let candidates =
        grid(&amounts, &[6.0, 8.0, 12.0, 24.0, 36.0], Route::Infusion, &Durations::Fixed(vec![1.0])).unwrap();
    assert_eq!(candidates.len(), 100);
    let targets = vec![parse_target("auc24=400..600").unwrap(), parse_target("trough=..20").unwrap()];
    let limits =
        Limits { max_peak_mg_l: Some(40.0), max_trough_mg_l: Some(25.0), max_risk: 0.1, ..Limits::default() };
    let sweep = Sweep {
        population: &population,
        candidates: &candidates,
        targets: &targets,
        limits: &limits,
        seed: 1,
    };
    let summary_of = |subjects: u64, rows: Option<&mut dyn std::io::Write>| {
        let tallies = sweep.run(0..subjects, rows, &mut |_| {}).expect("the sweep runs");
        let setup = Setup::new(serde_json::json!("bench"), 1, subjects, &candidates, &targets, &limits);
        let mut csv = Vec::new();
        Summary::of(&SweepState::new(setup, Shard::WHOLE, tallies, None))
            .write(&mut csv, Format::Csv, None)
            .unwrap();
        csv
    };
    let summary = |rows: Option<&mut dyn std::io::Write>| summary_of(SUBJECTS, rows);

    let mut group = c.benchmark_group("sweep_10k_subjects_x_100_regimens");
    group.sample_size(10).warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(10));
    group.throughput(Throughput::Elements(SUBJECTS * 100));
    group.bench_function("summary", |b| b.iter(|| summary(None)));
    group.bench_function("summary_and_per_subject_rows", |b| b.iter(|| summary(Some(&mut std::io::sink()))));
    group.finish();

    let mut group = c.benchmark_group("sweep_100k_subjects_x_100_regimens");
    group.sample_size(10).warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(20));
    group.throughput(Throughput::Elements(MANY * 100));
    for threads in [1, 2] {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().expect("a thread pool");
        group
            .bench_function(format!("summary_{threads}_thread{}", if threads > 1 { "s" } else { "" }), |b| {
                b.iter(|| pool.install(|| summary_of(MANY, None)))
            });
    }
    group.finish();
}

criterion_group!(benches, sweep);
criterion_main!(benches);
