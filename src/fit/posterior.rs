//! Sampling the individual posterior by adaptive importance sampling.
//!
//! The proposal starts as a multivariate Student t (ν = 5) centred at the MAP with the Laplace
//! covariance 2·H⁻¹ (the objective is −2 log posterior), then is refitted once to the weighted
//! mean and covariance of its own draws (population Monte Carlo: Cappé O et al. J Comput Graph
//! Stat 2004;13(4):907–929). Self-normalised weights
//! w ∝ exp(−½·objective(θ)) / q(θ) make the weighted draws a consistent sample of the exact
//! posterior, so intervals do not inherit the Laplace approximation's bias.

use super::linalg::{MAX, Mat, cholesky, quad_form, spd_inverse};
use super::objective::Problem;
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use statrs::distribution::{ChiSquared, Normal};

/// Degrees of freedom of the t proposal: heavy enough tails to cover a skewed posterior.
const NU: f64 = 5.0;

/// Weighted draws of θ from the posterior.
#[derive(Debug, Clone)]
pub struct WeightedDraws {
    /// The draws.
    pub theta: Vec<[f64; MAX]>,
    /// Normalised weights (sum 1).
    pub weights: Vec<f64>,
    /// Effective sample size 1/Σw².
    pub ess: f64,
}

impl WeightedDraws {
    /// The draws' indices in ascending order of `key(θ)`: sorted once, this order serves every
    /// quantile of every function that rises with the key (read it backwards for one that
    /// falls), instead of a sort per quantile.
    pub fn order_by(&self, key: impl Fn(&[f64; MAX]) -> f64) -> Vec<usize> {
        // The key as the unsigned integer that orders as `f64::total_cmp` does, with the draw's
        // index in the low bits: ascending keys, ties in the draws' order, as a stable sort of
        // the indices would give, by the faster unstable sort of plain integers.
        let mut keyed: Vec<u128> = self
            .theta
            .iter()
            .zip(0u128..)
            .map(|(t, i)| {
                let bits = key(t).to_bits();
                let ordered = if bits >> 63 == 1 { !bits } else { bits | 1 << 63 };
                u128::from(ordered) << 64 | i
            })
            .collect();
        keyed.sort_unstable();
        keyed.into_iter().map(|k| k as u64 as usize).collect()
    }

    /// Weighted quantile `p` ([`crate::stats::weighted_quantile`]) of `values` (one per draw)
    /// that rise along `order` (from [`WeightedDraws::order_by`], reversed for falling values).
    pub fn quantile_along(&self, order: impl IntoIterator<Item = usize>, p: f64, values: &[f64]) -> f64 {
        crate::stats::weighted_quantile(order.into_iter().map(|i| (values[i], self.weights[i])), p)
    }

    /// Weighted mean and standard deviation of a function of θ.
    pub fn mean_sd(&self, f: impl Fn(&[f64; MAX]) -> f64) -> (f64, f64) {
        let values: Vec<f64> = self.theta.iter().map(&f).collect();
        self.mean_sd_of(&values)
    }

    /// Weighted mean and standard deviation of `values` (one per draw).
    pub fn mean_sd_of(&self, values: &[f64]) -> (f64, f64) {
        let mean: f64 = values.iter().zip(&self.weights).map(|(x, w)| x * w).sum();
        let var: f64 = values.iter().zip(&self.weights).map(|(x, w)| w * (x - mean).powi(2)).sum();
        (mean, var.sqrt())
    }

    /// `count` unweighted draws by systematic resampling (deterministic given `u0` in [0, 1)).
    pub fn resample(&self, count: usize, u0: f64) -> Vec<[f64; MAX]> {
        let mut out = Vec::with_capacity(count);
        let mut acc = self.weights.first().copied().unwrap_or(0.0);
        let mut i = 0;
        for j in 0..count {
            let u = (j as f64 + u0) / count as f64;
            while acc < u && i + 1 < self.theta.len() {
                i += 1;
                acc += self.weights[i];
            }
            out.push(self.theta[i]);
        }
        out
    }
}

/// A multivariate t proposal.
struct Proposal {
    mean: [f64; MAX],
    chol: Mat,
    precision: Mat,
}

impl Proposal {
    fn new(mean: [f64; MAX], cov: &Mat, n: usize) -> Option<Proposal> {
        Some(Proposal { mean, chol: cholesky(cov, n)?, precision: spd_inverse(cov, n)? })
    }

    /// ln q(θ) up to a constant shared by all draws of this proposal.
    fn ln_density(&self, theta: &[f64; MAX], n: usize) -> f64 {
        let d: [f64; MAX] = std::array::from_fn(|i| theta[i] - self.mean[i]);
        -0.5 * (NU + n as f64) * (quad_form(&self.precision, n, &d) / NU).ln_1p()
    }

    fn draw(&self, n: usize, rng: &mut StdRng, normal: &Normal, chi: &ChiSquared) -> [f64; MAX] {
        let mut z = [0.0; MAX];
        for zi in z.iter_mut().take(n) {
            *zi = normal.sample(rng);
        }
        let scale = (NU / chi.sample(rng)).sqrt();
        let mut theta = self.mean;
        for i in 0..n {
            theta[i] += scale * (0..=i).map(|k| self.chol[i][k] * z[k]).sum::<f64>();
        }
        theta
    }
}

/// Sample the posterior of `problem` around its mode. `None` when the Laplace covariance is
/// not positive definite.
pub fn sample(
    problem: &Problem,
    mode: &[f64],
    hessian: &Mat,
    draws: usize,
    seed: u64,
) -> Option<WeightedDraws> {
    let n = problem.n;
    let mut cov = spd_inverse(hessian, n)?;
    for row in cov.iter_mut().take(n) {
        for x in row.iter_mut().take(n) {
            *x *= 2.0;
        }
    }
    let mut mean = [0.0; MAX];
    mean[..n].copy_from_slice(&mode[..n]);
    let mut rng = StdRng::seed_from_u64(seed);
    let normal = Normal::new(0.0, 1.0).ok()?;
    let chi = ChiSquared::new(NU).ok()?;
    let rounds = [draws.div_ceil(4).max(200), draws.max(1)];
    let mut last = None;
    for (round, &m) in rounds.iter().enumerate() {
        let proposal = Proposal::new(mean, &cov, n)?;
        let theta: Vec<[f64; MAX]> = (0..m).map(|_| proposal.draw(n, &mut rng, &normal, &chi)).collect();
        let log_w: Vec<f64> =
            theta.iter().map(|t| -0.5 * problem.cost(&t[..n]) - proposal.ln_density(t, n)).collect();
        let top = log_w.iter().copied().filter(|x| x.is_finite()).fold(f64::NEG_INFINITY, f64::max);
        let raw: Vec<f64> = log_w.iter().map(|x| if x.is_finite() { (x - top).exp() } else { 0.0 }).collect();
        let total: f64 = raw.iter().sum();
        if total <= 0.0 {
            return None;
        }
        let weights: Vec<f64> = raw.iter().map(|w| w / total).collect();
        let ess = 1.0 / weights.iter().map(|w| w * w).sum::<f64>();
        let sample = WeightedDraws { theta, weights, ess };
        if round + 1 < rounds.len() && ess > 20.0 {
            // Refit the proposal to the weighted draws (kept when positive definite).
            let mut new_mean = [0.0; MAX];
            for i in 0..n {
                new_mean[i] = sample.mean_sd(|t| t[i]).0;
            }
            let mut new_cov = [[0.0; MAX]; MAX];
            for i in 0..n {
                for j in 0..n {
                    new_cov[i][j] = sample
                        .theta
                        .iter()
                        .zip(&sample.weights)
                        .map(|(t, w)| w * (t[i] - new_mean[i]) * (t[j] - new_mean[j]))
                        .sum();
                }
            }
            if cholesky(&new_cov, n).is_some() {
                mean = new_mean;
                cov = new_cov;
            }
        }
        last = Some(sample);
    }
    last
}
