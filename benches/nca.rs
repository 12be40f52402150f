//! Non-compartmental analysis speed: 100,000 subjects with 12 levels each (issue 13: under 2 s
//! on two cores).
//!
//! Run with `cargo bench --bench nca`; docs/performance.md records the figures. The subjects
//! are invented benchmark data: one oral dose each, levels taken without noise from the
//! engine's exact one-compartment curve, with clearance, volume and absorption varied from
//! subject to subject by a fixed pattern.

use cistern::covariates::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::engine::{Params, concentrations};
use cistern::fit::SubjectData;
use cistern::io::levels::Level;
use cistern::nca::auc::AucRule;
use cistern::nca::intervals::BlqRule;
use cistern::nca::{LambdaZChoice, NcaOptions, analyse};
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use std::hint::black_box;
use std::time::Duration;

/// Subjects in the study.
const SUBJECTS: usize = 100_000;
/// Sampling times after the dose (h): 12 levels.
const TIMES: [f64; 12] = [0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 18.0, 24.0];

/// The invented study: 500 mg orally at time 0, the levels of the exact curve.
fn study() -> Vec<SubjectData> {
    (0..SUBJECTS)
        .map(|i| {
            // A fixed spread of ±30 % around CL 4 L/h, V 40 L, ka 1.2/h.
            let spread = |k: usize| 1.0 + 0.6 * (((i * k) % 101) as f64 / 100.0 - 0.5);
            let p = Params {
                cl_l_h: 4.0 * spread(37),
                v_l: 40.0 * spread(53),
                ka_per_h: Some(1.2 * spread(71)),
                f: 1.0,
                tlag_h: 0.0,
            };
            let doses = vec![Dose { time_h: 0.0, amount_mg: 500.0, route: Route::Oral, duration_h: 0.0 }];
            let levels = concentrations(&p, &doses, &TIMES)
                .into_iter()
                .zip(TIMES)
                .map(|(c, t)| Level { time_h: t, conc_mg_l: Some(c), lloq_mg_l: None, line: 0 })
                .collect();
            SubjectData { id: Some(format!("N{i}")), doses, levels, covariates: Covariates::default() }
        })
        .collect()
}

fn nca(c: &mut Criterion) {
    let subjects = study();
    let options = NcaOptions {
        auc_rule: AucRule::LinearUpLogDown,
        blq: BlqRule::ZeroThenDrop,
        lambda_z: LambdaZChoice::Automatic,
        partials: Vec::new(),
        lambda_z_times: Default::default(),
    };
    let mut group = c.benchmark_group("nca");
    group.sample_size(10).warm_up_time(Duration::from_secs(1)).measurement_time(Duration::from_secs(10));
    group.throughput(Throughput::Elements(SUBJECTS as u64));
    group.bench_function("100k_subjects_12_levels", |b| {
        b.iter(|| analyse(black_box(&subjects), black_box(&options)))
    });
    group.finish();
}

criterion_group!(benches, nca);
criterion_main!(benches);
