//! Population estimation speed: the theophylline study (12 oral subjects, 11 levels each, three
//! random effects), and studies of 1,000 and 10,000 sparse infusion subjects (two or three levels
//! each, two random effects).
//!
//! Run with `cargo bench --bench population`; docs/performance.md records the figures. The
//! large studies and the bootstrap take seconds per run, so they are timed once each, before the
//! criterion groups (criterion needs at least ten runs).

use cistern::covariates::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::engine::{Params, concentrations};
use cistern::fit::SubjectData;
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use cistern::population::{Method, Options, estimate};
use cistern::spec::Spec;
use cistern::workflow::{Required, Study};
use criterion::{Criterion, criterion_group, criterion_main};
use statrs::distribution::{ContinuousCDF, Normal};
use std::hint::black_box;
use std::path::Path;
use std::time::{Duration, Instant};

const MODEL: &str = include_str!("../tests/fixtures/plain_model.toml");

/// R's `Theoph` (open data, R's datasets package), as the reference script exported it, with the
/// start model of the nlme comparison.
fn theophylline() -> (Vec<SubjectData>, PopulationModel) {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/population/theoph");
    let mut spec = Spec::new();
    spec.inputs.model.set("--model", Some(dir.join("start_model.toml")));
    spec.inputs.doses.set("--doses", Some(dir.join("doses.csv")));
    spec.inputs.levels.set("--levels", Some(dir.join("levels.csv")));
    spec.inputs.covariates.set("--covariates", Some(dir.join("covariates.csv")));
    let study =
        Study::load(&spec.inputs, Required { model: true, levels: true }).expect("the theophylline study");
    (study.subjects, study.model.expect("the start model"))
}

/// `n` sparse subjects drawn from the invented benchmark model (invented benchmark data): one to
/// three 1-h infusions of 1 g every 12 h, two or three levels after the last, additive and
/// proportional error. The random effects are normal quantiles of a low-discrepancy sequence, so
/// the study is the same on every machine without a random-number generator.
fn sparse_study(n: usize, model: &PopulationModel) -> Vec<SubjectData> {
    let normal = Normal::standard();
    let quantile = |i: usize, base: f64| normal.inverse_cdf(((i as f64 + 0.5) * base).fract());
    let l = model.omega_factor();
    (0..n)
        .map(|i| {
            let z = [quantile(i, 0.618_033_988_75), quantile(i, 0.414_213_562_37)];
            let (cl, v) = model.typical_cl_v(&Covariates::default()).expect("typical values");
            let params = Params::iv(cl * (l[0][0] * z[0]).exp(), v * (l[1][0] * z[0] + l[1][1] * z[1]).exp());
            let doses: Vec<Dose> = (0..1 + i % 3)
                .map(|d| Dose {
                    time_h: 12.0 * d as f64,
                    amount_mg: 1000.0,
                    route: Route::Infusion,
                    duration_h: 1.0,
                })
                .collect();
            let last = doses.last().expect("a dose").time_h;
            let times: Vec<f64> =
                [2.0, 6.0 + (i % 5) as f64, 11.5].iter().take(2 + i % 2).map(|t| last + t).collect();
            let levels = times
                .iter()
                .zip(concentrations(&params, &doses, &times))
                .enumerate()
                .map(|(k, (&time_h, f))| Level {
                    time_h,
                    conc_mg_l: Some(
                        f + model.residual.variance(f).sqrt() * quantile(3 * i + k, 0.732_050_807_57),
                    ),
                    lloq_mg_l: None,
                    line: 0,
                })
                .collect();
            SubjectData { id: Some(format!("B{i}")), doses, levels, covariates: Covariates::default() }
        })
        .collect()
}

/// Peak resident memory of this process so far (kB), from /proc (Linux only).
fn peak_memory_kb() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    status.lines().find_map(|l| l.strip_prefix("VmHWM:")?.trim().strip_suffix("kB")?.trim().parse().ok())
}

/// Times one estimation and prints it with whether it converged; skipped when a filter is
/// given (`cargo bench --bench population -- FILTER`, as criterion's own) that `label` does not
/// contain.
fn once(label: &str, subjects: &[SubjectData], model: &PopulationModel, options: &Options) {
    if std::env::args().skip(1).find(|a| !a.starts_with('-')).is_some_and(|f| !label.contains(&f)) {
        return;
    }
    let start = Instant::now();
    let result = estimate(subjects, model, options).expect("the estimation runs");
    println!(
        "population/{label}: {:.2} s, converged {} ({}), {} adaptations, peak memory so far {} MB",
        start.elapsed().as_secs_f64(),
        result.converged,
        result.convergence.reason,
        result.convergence.adaptations,
        peak_memory_kb().map_or("?".into(), |k| (k / 1024).to_string())
    );
}

fn benches(c: &mut Criterion) {
    let (theoph, start) = theophylline();
    let model = PopulationModel::parse(&TomlText::new("bench.toml", MODEL)).expect("model");
    let laplace = Options { method: Method::Laplace, ..Options::default() };
    let quadrature = Options::default();
    for n in [1_000, 10_000] {
        let study = sparse_study(n, &model);
        once(&format!("{n}_sparse_subjects_laplace"), &study, &model, &laplace);
        if n == 1_000 {
            once(&format!("{n}_sparse_subjects_quadrature"), &study, &model, &quadrature);
        }
    }
    let bootstrap = Options { nodes: Some(7), bootstrap: 200, ..Options::default() };
    once("theophylline_7_nodes_bootstrap_200", &theoph, &start, &bootstrap);
    let bootstrap = Options { bootstrap: 200, ..Options::default() };
    once("theophylline_bootstrap_200", &theoph, &start, &bootstrap);

    let mut g = c.benchmark_group("population");
    g.sample_size(10).measurement_time(Duration::from_secs(10));
    for (label, options) in [
        ("theophylline_quadrature_adaptive_nodes", quadrature.clone()),
        ("theophylline_quadrature_7_nodes", Options { nodes: Some(7), ..Options::default() }),
        ("theophylline_laplace", laplace.clone()),
    ] {
        g.bench_function(label, |b| b.iter(|| black_box(estimate(&theoph, &start, &options).ok())));
    }
    g.finish();
}

criterion_group!(population, benches);
criterion_main!(population);
