//! Simulation–estimation: virtual subjects drawn from the prior, two levels each, fitted by MAP.
//!
//! When the true parameters are drawn from the prior and the levels from the residual-error
//! model (with values below the limit censored, exactly what the M3 likelihood assumes), the
//! exact posterior's 95 % intervals cover the truth 95 % of the time, and the posterior mean
//! of ln CL has zero mean error (exact identities of Bayesian inference, common practice, no
//! source). So the posterior intervals must cover 95 ± 2.5 % and the mean errors must be
//! within ±0.05 (the criteria). The Laplace intervals are measured and printed too;
//! they are expected to under-cover in such sparse designs, so they are not asserted.
//!
//! The population model, the covariates, the dose histories and the sampling times are
//! invented (a fictional drug). One seed fixes everything.

use cistern::covariates::Covariates;
use cistern::dosing::{Dose, Route};
use cistern::engine::{self, Params};
use cistern::fit::objective::{Fixed, Likelihood, Prior, Problem};
use cistern::fit::{FitOptions, FitResult, Intervals, Method, SubjectData, fit_all};
use cistern::io::levels::Level;
use cistern::io::tomlfile::TomlText;
use cistern::model::PopulationModel;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use statrs::distribution::Normal;

const SUBJECTS: usize = 4000;
const SEED: u64 = 20_240_601;
/// The assay's quantification limit (mg/L): simulated levels below it are reported as `<0.5`.
const LLOQ: f64 = 0.5;

/// Invented model of a fictional drug: the example values, with covariates and a
/// CL–V correlation.
const MODEL: &str = include_str!("../fixtures/covariate_model.toml");

/// One virtual subject and the truth behind its levels.
struct Virtual {
    data: SubjectData,
    truth: Params,
}

/// A dose history a ward might give: a course of 1 h (sometimes 2 h) infusions every 8, 12 or
/// 24 h, given up to half an hour late, sometimes after a loading bolus.
fn history(rng: &mut StdRng) -> Vec<Dose> {
    let amount = [500.0, 750.0, 1000.0, 1500.0][rng.random_range(0..4)];
    let every = [8.0, 12.0, 24.0][rng.random_range(0..3)];
    let duration = if rng.random_bool(0.8) { 1.0 } else { 2.0 };
    let count = rng.random_range(3..9);
    let mut doses: Vec<Dose> = (0..count)
        .map(|i| Dose {
            time_h: f64::from(i) * every + rng.random_range(0.0..0.5),
            amount_mg: amount,
            route: Route::Infusion,
            duration_h: duration,
        })
        .collect();
    if rng.random_bool(0.2) {
        doses[0] = Dose { time_h: 0.0, amount_mg: 1.5 * amount, route: Route::Bolus, duration_h: 0.0 };
    }
    doses
}

/// Two sampling times: a peak and a trough, two times in the last interval, one level after
/// an earlier dose and one after the last, or a peak and a washout level a day or more after
/// the course ended (often below the limit).
fn sampling_times(rng: &mut StdRng, doses: &[Dose]) -> [f64; 2] {
    let last = doses[doses.len() - 1];
    let every = doses[2].time_h - doses[1].time_h;
    let after_end = |d: &Dose, h: f64| d.time_h + d.duration_h + h;
    match rng.random_range(0..4) {
        3 => [after_end(&last, rng.random_range(0.5..1.5)), after_end(&last, rng.random_range(24.0..96.0))],
        0 => [after_end(&last, rng.random_range(0.5..1.5)), last.time_h + every - rng.random_range(0.1..1.0)],
        1 => {
            let a = rng.random_range(0.5..0.4 * every);
            [after_end(&last, a), after_end(&last, a + rng.random_range(1.0..0.6 * every))]
        }
        _ => [after_end(&doses[0], rng.random_range(0.5..3.0)), after_end(&last, rng.random_range(0.5..6.0))],
    }
}

fn population(model: &PopulationModel) -> Vec<Virtual> {
    let mut rng = StdRng::seed_from_u64(SEED);
    let normal = Normal::new(0.0, 1.0).unwrap();
    let (w_cl, w_v) = (model.clearance.omega2.sqrt(), model.volume.omega2.sqrt());
    let rho = model.correlation.cl_v.unwrap_or(0.0);
    (0..SUBJECTS)
        .map(|i| {
            let mut covariates = Covariates::default();
            covariates.set("crcl_ml_min", rng.random_range(30.0..130.0));
            covariates.set("weight_kg", rng.random_range(50.0..110.0));
            // η ~ N(0, Ω) through the Cholesky factor of the 2×2 Ω.
            let (z1, z2) = (normal.sample(&mut rng), normal.sample(&mut rng));
            let eta_cl = w_cl * z1;
            let eta_v = w_v * (rho * z1 + (1.0 - rho * rho).sqrt() * z2);
            let cl = model.clearance.typical_for(&covariates).unwrap() * eta_cl.exp();
            let v = model.volume.typical_for(&covariates).unwrap() * eta_v.exp();
            let truth = Params::iv(cl, v);
            let doses = history(&mut rng);
            let times = sampling_times(&mut rng, &doses);
            let levels = engine::concentrations(&truth, &doses, &times)
                .into_iter()
                .zip(times)
                .map(|(f, time_h)| {
                    let y = f + model.residual.variance(f).sqrt() * normal.sample(&mut rng);
                    let quantified = y >= LLOQ;
                    Level {
                        time_h,
                        conc_mg_l: quantified.then_some(y),
                        lloq_mg_l: (!quantified).then_some(LLOQ),
                        line: 0,
                    }
                })
                .collect();
            Virtual { data: SubjectData { id: Some(format!("V{i:04}")), doses, levels, covariates }, truth }
        })
        .collect()
}

/// What one kind of interval achieved over the population.
#[derive(Debug, Default)]
struct Tally {
    cl: usize,
    v: usize,
    k: usize,
}

impl Tally {
    fn add(&mut self, fit: &FitResult, truth: &Params) {
        let inside = |ci: Option<[f64; 2]>, x: f64| {
            let [lo, hi] = ci.expect("an interval");
            usize::from(lo <= x && x <= hi)
        };
        self.cl += inside(fit.estimates.cl_l_h.ci95, truth.cl_l_h);
        self.v += inside(fit.estimates.v_l.ci95, truth.v_l);
        self.k += inside(fit.estimates.k_per_h.ci95, truth.k_per_h());
    }

    fn percent(&self) -> [f64; 3] {
        [self.cl, self.v, self.k].map(|c| 100.0 * c as f64 / SUBJECTS as f64)
    }
}

fn fits(subjects: &[SubjectData], model: &PopulationModel, intervals: Intervals) -> Vec<FitResult> {
    let options =
        FitOptions { method: Method::Map, intervals, seed: SEED, keep_draws: 400, ..FitOptions::default() };
    fit_all(subjects, Some(model), &options).into_iter().map(|r| r.expect("every subject fits")).collect()
}

#[test]
fn posterior_intervals_are_calibrated_and_estimates_unbiased() {
    let model = PopulationModel::parse(&TomlText::new("calibration.toml", MODEL)).unwrap();
    let population = population(&model);
    let subjects: Vec<SubjectData> = population.iter().map(|p| p.data.clone()).collect();
    let blq = subjects.iter().flat_map(|s| &s.levels).filter(|l| l.is_blq()).count();

    let posterior = fits(&subjects, &model, Intervals::Posterior);
    let laplace = fits(&subjects, &model, Intervals::Laplace);

    let (mut post, mut lap) = (Tally::default(), Tally::default());
    // Mean error of ln CL and ln V: of the posterior mode (the reported estimate) and of the
    // posterior mean (over the kept, unweighted posterior draws).
    let (mut mode_err, mut mean_err) = ([0.0; 2], [0.0; 2]);
    let mut not_converged = 0;
    let mut ess_min = f64::INFINITY;
    for ((p, l), s) in posterior.iter().zip(&laplace).zip(&population) {
        post.add(p, &s.truth);
        lap.add(l, &s.truth);
        let truth = [s.truth.cl_l_h.ln(), s.truth.v_l.ln()];
        mode_err[0] += p.estimates.cl_l_h.value.ln() - truth[0];
        mode_err[1] += p.estimates.v_l.value.ln() - truth[1];
        let n = p.draws.len() as f64;
        mean_err[0] += p.draws.iter().map(|d| d.cl_l_h.ln()).sum::<f64>() / n - truth[0];
        mean_err[1] += p.draws.iter().map(|d| d.v_l.ln()).sum::<f64>() / n - truth[1];
        not_converged += usize::from(!p.converged);
        ess_min = ess_min.min(p.effective_draws.expect("posterior draws"));
    }
    let per = |x: [f64; 2]| x.map(|e| e / SUBJECTS as f64);
    let (mode_err, mean_err) = (per(mode_err), per(mean_err));
    let (pc, lc) = (post.percent(), lap.percent());
    eprintln!(
        "simulation–estimation: {SUBJECTS} subjects, 2 levels each, {blq} levels below {LLOQ} mg/L, seed {SEED}"
    );
    eprintln!("95 % coverage, posterior: CL {:.1} %, V {:.1} %, k {:.1} %", pc[0], pc[1], pc[2]);
    eprintln!("95 % coverage, Laplace:   CL {:.1} %, V {:.1} %, k {:.1} %", lc[0], lc[1], lc[2]);
    eprintln!("mean error of ln CL, ln V: posterior mode {mode_err:.4?}, posterior mean {mean_err:.4?}");
    eprintln!("not converged: {not_converged}; smallest effective number of draws: {ess_min:.0}");

    assert_eq!(posterior[0].draws.len(), 400);
    assert_eq!(not_converged, 0);
    assert!(blq > 0, "the design should exercise the M3 likelihood");
    for (name, c) in [("CL", pc[0]), ("V", pc[1])] {
        assert!((92.5..=97.5).contains(&c), "posterior 95 % interval coverage of {name}: {c:.1} %");
    }
    for e in mode_err.iter().chain(&mean_err) {
        assert!(e.abs() <= 0.05, "mean error of ln CL / ln V: mode {mode_err:?}, mean {mean_err:?}");
    }
}

/// The exact posterior of CL on a fine grid, by quadrature of exp(−objective/2) over
/// (ln CL, ln V): the 2.5 % and 97.5 % quantiles of ln CL, its standard deviation, and the
/// standard deviation of CL itself.
fn grid_posterior(problem: &Problem, centre: [f64; 2], half_width: [f64; 2]) -> [f64; 4] {
    const N: usize = 401;
    let step = half_width.map(|w| 2.0 * w / (N - 1) as f64);
    let at = |i: usize, d: usize| centre[d] - half_width[d] + i as f64 * step[d];
    let costs: Vec<f64> = (0..N * N).map(|ij| problem.cost(&[at(ij / N, 0), at(ij % N, 1)])).collect();
    let low = costs.iter().copied().fold(f64::INFINITY, f64::min);
    let marginal: Vec<f64> =
        (0..N).map(|i| (0..N).map(|j| (-0.5 * (costs[i * N + j] - low)).exp()).sum()).collect();
    let total: f64 = marginal.iter().sum();
    // The edges must carry no mass, or the grid is too narrow.
    assert!(marginal[0] / total < 1e-12 && marginal[N - 1] / total < 1e-12);
    // Each grid value is the mass of its cell, spread evenly over it: the CDF is piecewise linear.
    let quantile = |p: f64| {
        let mut acc = 0.0;
        for (i, m) in marginal.iter().enumerate() {
            let mass = m / total;
            if acc + mass >= p {
                return at(i, 0) - 0.5 * step[0] + step[0] * (p - acc) / mass;
            }
            acc += mass;
        }
        f64::NAN
    };
    let moments = |g: &dyn Fn(f64) -> f64| {
        let mean = (0..N).map(|i| g(at(i, 0)) * marginal[i]).sum::<f64>() / total;
        let var = (0..N).map(|i| (g(at(i, 0)) - mean).powi(2) * marginal[i]).sum::<f64>() / total;
        var.sqrt()
    };
    [quantile(0.025), quantile(0.975), moments(&|x| x), moments(&f64::exp)]
}

#[test]
fn the_posterior_sampler_matches_quadrature_of_the_exact_posterior() {
    // A direct check of the importance sampler, subject by subject, against a 401 × 401 grid
    // quadrature of the same unnormalised posterior (built here from the model: Ω⁻¹ written
    // out for 2 × 2). With 20,000 draws the Monte Carlo error of a 2.5 % or 97.5 % quantile is
    // about 0.03 posterior SD, so the endpoints must agree to 0.15 SD and the SD to 5 %.
    let model = PopulationModel::parse(&TomlText::new("calibration.toml", MODEL)).unwrap();
    // The first 30 subjects, and the first 10 with a level below the limit (the M3 term).
    let all: Vec<SubjectData> = population(&model).into_iter().map(|p| p.data).collect();
    let blq = all.iter().skip(30).filter(|s| s.levels.iter().any(Level::is_blq)).take(10);
    let subjects: Vec<SubjectData> = all.iter().take(30).chain(blq).cloned().collect();
    assert_eq!(subjects.len(), 40);
    let options = FitOptions { method: Method::Map, draws: 20_000, seed: SEED, ..FitOptions::default() };
    let results = fit_all(&subjects, Some(&model), &options);
    let (w_cl, w_v) = (model.clearance.omega2, model.volume.omega2);
    let c = model.omega()[0][1];
    let det = w_cl * w_v - c * c;
    let precision = [[w_v / det, -c / det, 0.0], [-c / det, w_cl / det, 0.0], [0.0; 3]];
    let mut worst = [0.0f64; 2];
    for (s, r) in subjects.iter().zip(results) {
        let fit = r.unwrap();
        let typical = |p: &cistern::model::Parameter| p.typical_for(&s.covariates).unwrap().ln();
        let prior = Prior { mean: [typical(&model.clearance), typical(&model.volume), 0.0], precision };
        let fixed = Fixed { n: 2, ka_per_h: None, f: 1.0, tlag_h: 0.0 };
        let problem =
            Problem::new(&s.doses, &s.levels, fixed, Likelihood::Bayes(model.residual), Some(prior));
        let mode = [fit.estimates.cl_l_h.value.ln(), fit.estimates.v_l.value.ln()];
        let [lo, hi, sd_ln, sd] = grid_posterior(&problem, mode, [7.0 * w_cl.sqrt(), 7.0 * w_v.sqrt()]);
        let [ci_lo, ci_hi] = fit.estimates.cl_l_h.ci95.unwrap();
        let ends = (ci_lo.ln() - lo).abs().max((ci_hi.ln() - hi).abs()) / sd_ln;
        let spread = (fit.estimates.cl_l_h.se.unwrap() / sd - 1.0).abs();
        worst = [worst[0].max(ends), worst[1].max(spread)];
        let what = format!("{:?}: sampled {ci_lo}–{ci_hi}, quadrature {}–{}", s.id, lo.exp(), hi.exp());
        assert!(ends < 0.15 && spread < 0.05, "{what}; SD {:?} vs {sd}", fit.estimates.cl_l_h.se);
    }
    eprintln!(
        "sampler vs quadrature, 40 subjects: interval ends within {:.3} posterior SD, SD of CL within {:.1} %",
        worst[0],
        100.0 * worst[1]
    );
}
