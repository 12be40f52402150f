//! When to draw the next level: Bayesian optimal design for one subject.
//!
//! For each candidate sampling time t the advisor asks how much one more level at t would
//! shrink the posterior uncertainty of the exposure the target is on (AUC24, trough, …). It is
//! a preposterior analysis (Chaloner K, Verdinelli I. Statist Sci 1995;10(3):273–304) done by
//! importance reweighting of the current posterior draws θᵢ:
//!
//! 1. simulate a future level y = f(θₛ, t) + ε, with θₛ a random draw and ε ~ N(0, σ²(f));
//! 2. weight every draw by its likelihood p(y | θᵢ) — the posterior after observing y;
//! 3. record the weighted variance and 90 % interval width of the exposure m(θᵢ);
//! 4. average over many simulated levels.
//!
//! The expected narrowing of the interval is 1 − E[width after] / width now (not the
//! "shrinkage" of population analysis, which measures how far individual estimates are pulled
//! to the typical value). The level is taken as quantified.

use crate::dosing::Dose;
use crate::engine::{self, Params};
use crate::model::Residual;
use crate::stats::weighted_quantile;
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use rayon::prelude::*;
use serde::Serialize;
use statrs::distribution::Normal;

/// The value of drawing a level at one time.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SampleValue {
    /// Sampling time (h, on the history's clock).
    pub time_h: f64,
    /// Hours after the most recent dose at that time.
    pub after_dose_h: f64,
    /// Expected posterior standard deviation of the exposure after the level.
    pub expected_sd: f64,
    /// Expected width of its 90 % interval after the level.
    pub expected_ci90_width: f64,
    /// Expected narrowing of the 90 % interval (%).
    pub interval_narrowing_pct: f64,
}

/// The advice: the current uncertainty and each candidate time's value, best first.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Advice {
    /// What the uncertainty is about (e.g. `auc24_mg_h_l`).
    pub exposure: String,
    /// Current posterior standard deviation of the exposure.
    pub current_sd: f64,
    /// Current 90 % interval width.
    pub current_ci90_width: f64,
    /// Candidate times, the most informative first.
    pub times: Vec<SampleValue>,
}

/// Weighted 5–95 % width of values given with their weights in ascending order of value,
/// weights summing to 1 ([`crate::stats::weighted_quantile`]).
fn ci90_width(sorted: impl Iterator<Item = (f64, f64)> + Clone) -> f64 {
    weighted_quantile(sorted.clone(), 0.95) - weighted_quantile(sorted, 0.05)
}

/// What the advisor weighs.
#[derive(Debug, Clone)]
pub struct Question<'a> {
    /// Equal-weight posterior draws.
    pub draws: &'a [Params],
    /// The exposure of each draw.
    pub exposure: &'a [f64],
    /// Its name, for the output (e.g. `auc24_mg_h_l`).
    pub exposure_name: &'a str,
    /// The history continued by the planned regimen.
    pub doses: &'a [Dose],
    /// Candidate sampling times (h).
    pub times: &'a [f64],
    /// Residual error of a new level.
    pub residual: Residual,
    /// Simulated levels per time.
    pub simulations: usize,
    /// Seed of the simulations.
    pub seed: u64,
}

/// Rank the candidate times by how much a level there would narrow the posterior of the
/// exposure.
pub fn advise(q: &Question) -> Advice {
    let Question { draws, exposure, exposure_name, doses, times, simulations, .. } = q.clone();
    let n = draws.len();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| exposure[a].total_cmp(&exposure[b]));
    let sorted: Vec<f64> = order.iter().map(|&i| exposure[i]).collect();
    let mean0: f64 = exposure.iter().sum::<f64>() / n as f64;
    let sd0 = (exposure.iter().map(|m| (m - mean0).powi(2)).sum::<f64>() / n as f64).sqrt();
    let width0 = ci90_width(sorted.iter().map(|&m| (m, 1.0 / n as f64)));
    // Predictions of every draw at every candidate time: one pass of the engine per draw.
    let predictions: Vec<Vec<f64>> =
        draws.par_iter().map(|p| engine::concentrations(p, doses, times)).collect();
    let mut values: Vec<SampleValue> = (0..times.len())
        .into_par_iter()
        .map(|j| {
            let t = times[j];
            let f: Vec<f64> = predictions.iter().map(|row| row[j]).collect();
            let (var_sum, width_sum) = simulate_levels(q, &f, |weights| {
                ci90_width(sorted.iter().zip(&order).map(|(&m, &i)| (m, weights[i])))
            });
            let k = simulations as f64;
            let width = width_sum / k;
            SampleValue {
                time_h: t,
                after_dose_h: t - doses.iter().map(|d| d.time_h).filter(|&d| d <= t).fold(f64::NAN, f64::max),
                expected_sd: (var_sum / k).sqrt(),
                expected_ci90_width: width,
                interval_narrowing_pct: 100.0 * (1.0 - width / width0),
            }
        })
        .collect();
    values.sort_by(|a, b| {
        b.interval_narrowing_pct.total_cmp(&a.interval_narrowing_pct).then(a.time_h.total_cmp(&b.time_h))
    });
    Advice { exposure: exposure_name.to_string(), current_sd: sd0, current_ci90_width: width0, times: values }
}

/// `q.simulations` levels simulated at one time from the draws' predictions `f` there (a draw
/// drawn at random, plus its residual error), each turned into posterior weights of the draws:
/// the sums over the simulations of the exposure's posterior variance and of `width` of the
/// weights. Every time replays the same random stream (common random numbers): the result does
/// not depend on threads, and the times are compared on the same simulated draws and residuals,
/// so their ranking is not lost in simulation noise.
fn simulate_levels(q: &Question, f: &[f64], mut width: impl FnMut(&[f64]) -> f64) -> (f64, f64) {
    let n = f.len();
    let normal = Normal::new(0.0, 1.0).expect("standard normal");
    let mut rng = StdRng::seed_from_u64(q.seed);
    let inv_var: Vec<f64> = f.iter().map(|&x| 1.0 / q.residual.variance(x)).collect();
    let ln_var: Vec<f64> = inv_var.iter().map(|iv| -iv.ln()).collect();
    let (mut var_sum, mut width_sum) = (0.0, 0.0);
    let mut weights = vec![0.0; n];
    for _ in 0..q.simulations {
        let s = (rand::RngExt::random::<u64>(&mut rng) % n as u64) as usize;
        let y = f[s] + (1.0 / inv_var[s]).sqrt() * normal.sample(&mut rng);
        posterior_weights(y, f, &inv_var, &ln_var, &mut weights);
        let mean: f64 = weights.iter().zip(q.exposure).map(|(w, m)| w * m).sum();
        var_sum += weights.iter().zip(q.exposure).map(|(w, m)| w * (m - mean).powi(2)).sum::<f64>();
        width_sum += width(&weights);
    }
    (var_sum, width_sum)
}

/// Each draw's posterior weight after a simulated level `y`, normalised to sum to 1: the normal
/// likelihood of `y` under the draw's prediction `f[i]` and residual variance 1/`inv_var[i]`
/// (`ln_var[i]` its logarithm), shifted by the largest so the exponentials cannot overflow.
fn posterior_weights(y: f64, f: &[f64], inv_var: &[f64], ln_var: &[f64], weights: &mut [f64]) {
    let mut top = f64::NEG_INFINITY;
    for i in 0..weights.len() {
        weights[i] = -0.5 * ((y - f[i]).powi(2) * inv_var[i] + ln_var[i]);
        top = top.max(weights[i]);
    }
    let mut total = 0.0;
    for w in weights.iter_mut() {
        *w = (*w - top).exp();
        total += *w;
    }
    weights.iter_mut().for_each(|w| *w /= total);
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // equality to the bit is what the tests assert
mod tests {
    use super::*;
    use crate::dosing::Route;

    /// The advisor as first written where it has changed since (the weighted quantiles read
    /// through the order of the draws, the predictions one draw after another): the reference
    /// the advice must equal to the bit.
    fn draw_by_draw(q: &Question) -> Vec<(f64, f64, f64)> {
        let Question { draws, exposure, doses, times, .. } = q.clone();
        let n = draws.len();
        let mut order: Vec<usize> = (0..n).collect();
        order.sort_by(|&a, &b| exposure[a].total_cmp(&exposure[b]));
        let width = |w: &[f64]| {
            let q = |p| weighted_quantile(order.iter().map(|&i| (exposure[i], w[i])), p);
            q(0.95) - q(0.05)
        };
        let predictions: Vec<Vec<f64>> =
            draws.iter().map(|p| engine::concentrations(p, doses, times)).collect();
        (0..times.len())
            .map(|j| {
                let f: Vec<f64> = predictions.iter().map(|row| row[j]).collect();
                let (var_sum, width_sum) = simulate_levels(q, &f, width);
                (times[j], var_sum, width_sum)
            })
            .collect()
    }

    /// The advice is the first-written advisor's to the bit (repeated draws included, as
    /// resampling repeats them).
    #[test]
    fn the_advice_is_the_first_written_advisor_s_to_the_bit() {
        let draws: Vec<Params> = (0..150)
            .map(|i| {
                // Draws 3k, 3k+1 repeat one parameter set, as resampling repeats a draw.
                let j = i - usize::from(i % 3 == 1);
                let x = ((j * 37) % 101) as f64 / 101.0;
                Params {
                    cl_l_h: 3.0 + 3.0 * x,
                    v_l: 30.0 + 20.0 * ((j * 13) % 7) as f64 / 7.0,
                    ka_per_h: None,
                    f: 1.0,
                    tlag_h: 0.0,
                }
            })
            .collect();
        let exposure: Vec<f64> = draws.iter().map(|p| 24.0 * 1000.0 / p.cl_l_h).collect();
        let doses: Vec<Dose> = (0..4)
            .map(|k| Dose {
                time_h: 12.0 * f64::from(k),
                amount_mg: 1000.0,
                route: Route::Infusion,
                duration_h: 1.0,
            })
            .collect();
        let times: Vec<f64> = (1..=20).map(|k| 36.0 + 0.6 * f64::from(k)).collect();
        let q = Question {
            draws: &draws,
            exposure: &exposure,
            exposure_name: "auc24_mg_h_l",
            doses: &doses,
            times: &times,
            residual: Residual { additive_mg_l: 0.5, proportional_cv: 0.15 },
            simulations: 60,
            seed: 11,
        };
        let advice = advise(&q);
        let k = q.simulations as f64;
        for (t, var_sum, width_sum) in draw_by_draw(&q) {
            let v = advice.times.iter().find(|v| v.time_h == t).expect("every time advised on");
            assert_eq!(v.expected_sd.to_bits(), (var_sum / k).sqrt().to_bits(), "t {t}");
            assert_eq!(v.expected_ci90_width.to_bits(), (width_sum / k).to_bits(), "t {t}");
        }
    }
}
