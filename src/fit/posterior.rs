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
use crate::engine::schedule::LaneFactors;
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use statrs::distribution::{ChiSquared, Normal};

/// Degrees of freedom of the t proposal: heavy enough tails to cover a skewed posterior.
const NU: f64 = 5.0;

/// Draws whose objective is evaluated together ([`Problem::costs_and_parameters`]): the
/// recorded walk's moves are looked at once for all of them.
const LANES: usize = 8;

/// Weighted draws of θ from the posterior.
#[derive(Debug, Clone)]
pub struct WeightedDraws {
    /// The draws.
    pub theta: Vec<[f64; MAX]>,
    /// Their parameters CL, V and ka (e^θ, or the fixed ka), as the objective computed them.
    pub parameters: Vec<[f64; MAX]>,
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
        let keys: Vec<f64> = self.theta.iter().map(key).collect();
        ascending_order(&keys)
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

/// The indices of `keys` in ascending order of `f64::total_cmp`, ties in index order: the
/// order a stable sort of the indices gives.
///
/// Draws' keys spread smoothly around their mean, so they are first dealt, in index order,
/// into as many buckets as there are keys by their place in mean ± 3 SD (the few beyond go to
/// the end buckets; a monotone map: no key lands in a bucket below a smaller key's). Each
/// bucket then holds one or a few keys, put in order by one insertion pass over the whole
/// array, which never moves a key past its bucket's start and costs no call or branch per
/// bucket; the rare crowded bucket (more than [`CROWDED`] keys: heavy tails, or keys not all
/// finite, which all go to one bucket) is sorted on its own by a stable sort first, so the
/// pass stays linear.
fn ascending_order(keys: &[f64]) -> Vec<usize> {
    let n = keys.len();
    let mean = keys.iter().sum::<f64>() / n as f64;
    let sd = (keys.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / n as f64).sqrt();
    let (lo, scale) = (mean - 3.0 * sd, n as f64 / (6.0 * sd));
    // (x − lo)·scale never falls as x rises (rounding is monotone), and the cast saturates: below
    // lo is bucket 0. With keys not all finite, or all equal, everything is bucket 0.
    let spread = lo.is_finite() && scale.is_finite() && keys.iter().all(|x| x.is_finite());
    let (lo, scale) = if spread { (lo, scale) } else { (0.0, 0.0) };
    let last = n.saturating_sub(1);
    let buckets: Vec<usize> = keys.iter().map(|&x| (((x - lo) * scale) as usize).min(last)).collect();
    // Where each bucket starts; advanced as it is filled, it then holds where the bucket ends.
    let mut next = vec![0usize; n + 1];
    for &b in &buckets {
        next[b + 1] += 1;
    }
    for b in 1..=n {
        next[b] += next[b - 1];
    }
    let mut order = vec![0usize; n];
    for (i, &b) in buckets.iter().enumerate() {
        order[next[b]] = i;
        next[b] += 1;
    }
    let before = |a: usize, b: usize| keys[a].total_cmp(&keys[b]).is_lt();
    let mut start = 0;
    for &end in &next[..n] {
        if end - start > CROWDED {
            order[start..end].sort_by(|&a, &b| keys[a].total_cmp(&keys[b]));
        }
        start = end;
    }
    // Stable: a key moves only past larger ones.
    for i in 1..n {
        let key = order[i];
        let mut j = i;
        while j > 0 && before(key, order[j - 1]) {
            order[j] = order[j - 1];
            j -= 1;
        }
        order[j] = key;
    }
    order
}

/// A bucket with more keys than this is sorted on its own before the insertion pass.
const CROWDED: usize = 16;

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
    let mut room = LaneFactors::default();
    for (round, &m) in rounds.iter().enumerate() {
        let proposal = Proposal::new(mean, &cov, n)?;
        let theta: Vec<[f64; MAX]> = (0..m).map(|_| proposal.draw(n, &mut rng, &normal, &chi)).collect();
        let mut log_w = Vec::with_capacity(m);
        let mut parameters = Vec::with_capacity(m);
        for chunk in theta.chunks(LANES) {
            // The last chunk is filled up with its last draw; the copies' results are dropped.
            let lanes: [[f64; MAX]; LANES] = std::array::from_fn(|i| chunk[i.min(chunk.len() - 1)]);
            for (t, (cost, p)) in chunk.iter().zip(problem.costs_and_parameters(&lanes, &mut room)) {
                log_w.push(-0.5 * cost - proposal.ln_density(t, n));
                parameters.push(p);
            }
        }
        let top = log_w.iter().copied().filter(|x| x.is_finite()).fold(f64::NEG_INFINITY, f64::max);
        let raw: Vec<f64> = log_w.iter().map(|x| if x.is_finite() { (x - top).exp() } else { 0.0 }).collect();
        let total: f64 = raw.iter().sum();
        if total <= 0.0 {
            return None;
        }
        let weights: Vec<f64> = raw.iter().map(|w| w / total).collect();
        let ess = 1.0 / weights.iter().map(|w| w * w).sum::<f64>();
        let sample = WeightedDraws { theta, parameters, weights, ess };
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

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use proptest::test_runner::RngSeed;

    /// The order of a stable sort of the indices by `f64::total_cmp`.
    fn sorted(keys: &[f64]) -> Vec<usize> {
        let mut order: Vec<usize> = (0..keys.len()).collect();
        order.sort_by(|&a, &b| keys[a].total_cmp(&keys[b]));
        order
    }

    fn key() -> impl Strategy<Value = f64> {
        prop_oneof![
            8 => -3.0..3.0,
            // Heavy tails crowd the rest into few buckets; repeated values are ties.
            1 => prop_oneof![Just(-1.7e308), Just(1e-300), Just(4e5), Just(1.7e308), Just(1.5)],
            1 => prop_oneof![Just(0.0), Just(-0.0), Just(f64::MIN_POSITIVE), Just(-5e-324)],
            1 => prop_oneof![Just(f64::INFINITY), Just(f64::NEG_INFINITY), Just(f64::NAN), Just(-f64::NAN)],
        ]
    }

    proptest! {
        #![proptest_config(ProptestConfig {
            cases: 2000,
            rng_seed: RngSeed::Fixed(0x5EED_0016),
            failure_persistence: None,
            ..ProptestConfig::default()
        })]

        #[test]
        fn the_bucketed_order_is_the_stable_sorts(
            keys in prop::collection::vec(key(), 0..300),
            finite in any::<bool>(),
        ) {
            let keys: Vec<f64> =
                if finite { keys.into_iter().filter(|x| x.is_finite()).collect() } else { keys };
            prop_assert_eq!(ascending_order(&keys), sorted(&keys));
        }
    }

    #[test]
    fn equal_and_nearly_equal_keys_keep_the_index_order() {
        for keys in [vec![], vec![2.0], vec![1.0; 5], vec![1.0, 1.0 + f64::EPSILON, 1.0, 1.0]] {
            assert_eq!(ascending_order(&keys), sorted(&keys), "{keys:?}");
        }
        let tiny = [5e-324, 0.0, 1e-323, -0.0, 5e-324];
        assert_eq!(ascending_order(&tiny), sorted(&tiny));
    }
}
