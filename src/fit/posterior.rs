//! Sampling the individual posterior by adaptive importance sampling.
//!
//! The proposal starts as a multivariate Student t (ν = 5) centred at the MAP with the Laplace
//! covariance 2·H⁻¹ (the objective is −2 log posterior), then is refitted once to the weighted
//! mean and covariance of its own draws (population Monte Carlo: Cappé O et al. J Comput Graph
//! Stat 2004;13(4):907–929). Self-normalised weights
//! w ∝ exp(−½·objective(θ)) / q(θ) make the weighted draws a consistent sample of the exact
//! posterior, so intervals do not inherit the Laplace approximation's bias.

use super::linalg::{MAX, Mat, cholesky, spd_inverse};
use super::objective::Problem;
use crate::engine::schedule::LaneFactors;
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use statrs::distribution::{ChiSquared, Normal};

/// Degrees of freedom of the t proposal: heavy enough tails to cover a skewed posterior. A
/// whole number, so that the power u^(ν + n) in the density is a few multiplications.
const DEGREES: i32 = 5;
const NU: f64 = DEGREES as f64;

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
    /// The weighted `lower`- and `upper`-quantiles of `values` (one per draw, in any order),
    /// `lower` ≤ ½ < `upper`: each the first value in ascending order at which the cumulative
    /// weight reaches p ([`crate::stats::weighted_quantile`]). The upper one is found from the
    /// top, as the smallest value with at most 1 − p of the weight above it: the same value but
    /// for the rounding of the sums, which now run over the short tail.
    ///
    /// Only the tails that hold the quantiles are sorted. Draws' values spread smoothly around
    /// their mean, so they are dealt into as many buckets as there are values by their place in
    /// mean ± 3 SD (the few beyond go to the end buckets; a monotone map: no value lands in a
    /// bucket below a smaller value's), the buckets' weights are added up from each end until
    /// they pass the tail's weight with room to spare ([`SLACK`]), and only those buckets'
    /// values are sorted and walked. Values not all finite, or all equal, are all sorted.
    pub fn interval(&self, values: &[f64], lower: f64, upper: f64) -> [f64; 2] {
        debug_assert!(lower <= 0.5 && upper > 0.5);
        let tail = 1.0 - upper;
        let [low, high] = self.tails(values, [lower, tail]);
        let found =
            [walk_up(&low, values, &self.weights, lower), walk_down(&high, values, &self.weights, tail)];
        if let [Some(a), Some(b)] = found {
            return [a, b];
        }
        // A tail ran out before its quantile: walk everything (not reached in practice; when
        // rounding leaves the weight short, the far end's value).
        let all = sorted((0..values.len()).collect(), values);
        let end = |i: Option<&usize>| i.map_or(f64::NAN, |&i| values[i]);
        [
            walk_up(&all, values, &self.weights, lower).unwrap_or_else(|| end(all.last())),
            walk_down(&all, values, &self.weights, tail).unwrap_or_else(|| end(all.first())),
        ]
    }

    /// The indices of the values in the lowest buckets that hold more than `tails[0]` +
    /// [`SLACK`] of the weight and in the highest that hold more than `tails[1]` + [`SLACK`],
    /// each in ascending order of value, ties in index order; all of them, twice, when the
    /// values do not spread.
    fn tails(&self, values: &[f64], tails: [f64; 2]) -> [Vec<usize>; 2] {
        let n = values.len();
        let (mut sum, mut squares, mut finite) = (0.0, 0.0, true);
        for &x in values {
            sum += x;
            squares += x * x;
            finite &= x.is_finite();
        }
        let mean = sum / n as f64;
        let sd = (squares / n as f64 - mean * mean).max(0.0).sqrt();
        let (lo, scale) = (mean - 3.0 * sd, n as f64 / (6.0 * sd));
        if !(finite && lo.is_finite() && scale.is_finite()) {
            let all = sorted((0..n).collect(), values);
            return [all.clone(), all];
        }
        // (x − lo)·scale never falls as x rises (rounding is monotone), and the cast saturates:
        // below lo is bucket 0.
        let last = n - 1;
        let mut mass = vec![0.0; n];
        let buckets: Vec<usize> = values
            .iter()
            .zip(&self.weights)
            .map(|(&x, w)| {
                let b = (((x - lo) * scale) as usize).min(last);
                mass[b] += w;
                b
            })
            .collect();
        // The first bucket, counted from one end, by which the weight passes the tail's.
        let edge = |order: &mut dyn Iterator<Item = usize>, tail: f64| {
            let mut acc = 0.0;
            for b in order {
                acc += mass[b];
                if acc > tail + SLACK {
                    return Some(b);
                }
            }
            None
        };
        let low_edge = edge(&mut (0..n), tails[0]).unwrap_or(last);
        let high_edge = edge(&mut (0..n).rev(), tails[1]).unwrap_or(0);
        let (mut low, mut high) = (Vec::new(), Vec::new());
        for (i, &b) in buckets.iter().enumerate() {
            if b <= low_edge {
                low.push(i);
            }
            if b >= high_edge {
                high.push(i);
            }
        }
        [sorted(low, values), sorted(high, values)]
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

/// `indices` (ascending) in ascending order of their values by `f64::total_cmp`, ties in index
/// order.
fn sorted(mut indices: Vec<usize>, values: &[f64]) -> Vec<usize> {
    indices.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    indices
}

/// Room left above the tail's weight when the buckets are added up: far more than the rounding
/// of any sum of weights, so the sorted tail always holds the quantile.
const SLACK: f64 = 1e-9;

/// [`crate::stats::weighted_quantile`] along `order` (ascending), `None` when the weight does
/// not reach `p`.
fn walk_up(order: &[usize], values: &[f64], weights: &[f64], p: f64) -> Option<f64> {
    let mut cumulative = 0.0;
    order
        .iter()
        .find(|&&i| {
            cumulative += weights[i];
            cumulative >= p
        })
        .map(|&i| values[i])
}

/// The smallest value along `order` (ascending, walked from its top) with at most `tail` of the
/// weight above it; `None` when all of `order` holds no more than `tail`, so that a smaller
/// value outside it may qualify too.
fn walk_down(order: &[usize], values: &[f64], weights: &[f64], tail: f64) -> Option<f64> {
    let mut above = 0.0;
    let mut found = None;
    for &i in order.iter().rev() {
        if above > tail {
            break;
        }
        found = Some(values[i]);
        above += weights[i];
    }
    found.filter(|_| above > tail)
}

/// A multivariate t proposal.
struct Proposal {
    mean: [f64; MAX],
    chol: Mat,
}

impl Proposal {
    fn new(mean: [f64; MAX], cov: &Mat, n: usize) -> Option<Proposal> {
        Some(Proposal { mean, chol: cholesky(cov, n)? })
    }

    /// A draw θ = mean + L·z·√(ν/χ²), with u = 1 + Q/ν, where Q = (θ − mean)ᵀΣ⁻¹(θ − mean) is
    /// (ν/χ²)·zᵀz exactly (L·Lᵀ = Σ), so taken from the variates themselves: ln q(θ) is
    /// −(ν + n)/2 · ln u up to a constant shared by all draws of this proposal.
    ///
    /// u is the rounded sum and its logarithm is taken as such (with the objective's, in
    /// [`sample`]), not by `ln_1p`: a log weight needs absolute accuracy, and rounding 1 + x
    /// (x ≥ 0) moves its logarithm by at most 2⁻⁵³.
    fn draw(&self, n: usize, rng: &mut StdRng, normal: &Normal, chi: &ChiSquared) -> ([f64; MAX], f64) {
        let mut z = [0.0; MAX];
        for zi in z.iter_mut().take(n) {
            *zi = normal.sample(rng);
        }
        let chi2 = chi.sample(rng);
        let scale = (NU / chi2).sqrt();
        let mut theta = self.mean;
        for i in 0..n {
            theta[i] += scale * (0..=i).map(|k| self.chol[i][k] * z[k]).sum::<f64>();
        }
        let zz: f64 = z.iter().map(|x| x * x).sum();
        (theta, 1.0 + zz / chi2)
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
    // A first round of a tenth of the draws (at least 200) adapts the proposal about as well
    // as a quarter did: 1 % less effective sample size for 12 % fewer evaluations
    // (docs/methods.md section 7.7).
    let rounds = [draws.div_ceil(10).max(200), draws.max(1)];
    let mut last = None;
    let mut room = LaneFactors::default();
    for (round, &m) in rounds.iter().enumerate() {
        let proposal = Proposal::new(mean, &cov, n)?;
        let (mut theta, mut u) = (Vec::with_capacity(m), Vec::with_capacity(m));
        for _ in 0..m {
            let (t, ui) = proposal.draw(n, &mut rng, &normal, &chi);
            theta.push(t);
            u.push(ui);
        }
        let mut log_w = Vec::with_capacity(m);
        let mut parameters = Vec::with_capacity(m);
        for (chunk, u_chunk) in theta.chunks(LANES).zip(u.chunks(LANES)) {
            // The last chunk is filled up with its last draw; the copies' results are dropped.
            let lanes: [[f64; MAX]; LANES] = std::array::from_fn(|i| chunk[i.min(chunk.len() - 1)]);
            // ln w = −½·objective − ln q = −½·(objective − (ν + n)·ln u): one logarithm a draw.
            for (&ui, (cost, p)) in u_chunk.iter().zip(problem.costs_and_parameters(&lanes, &mut room)) {
                log_w.push(-0.5 * cost.less_ln_power(ui, DEGREES + n as i32));
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

    /// Weighted draws with these weights (θ unused).
    fn draws(weights: Vec<f64>) -> WeightedDraws {
        let n = weights.len();
        WeightedDraws { theta: vec![[0.0; MAX]; n], parameters: vec![[0.0; MAX]; n], weights, ess: 1.0 }
    }

    /// One end of [`WeightedDraws::interval`]: the lower for p ≤ ½, else the upper.
    fn quantile(draws: &WeightedDraws, values: &[f64], p: f64) -> f64 {
        if p <= 0.5 { draws.interval(values, p, 0.975)[0] } else { draws.interval(values, 0.025, p)[1] }
    }

    /// The quantile from a full stable sort ([`crate::stats::weighted_quantile`]).
    fn by_full_sort(values: &[f64], weights: &[f64], p: f64) -> f64 {
        let order = sorted((0..values.len()).collect(), values);
        crate::stats::weighted_quantile(order.iter().map(|&i| (values[i], weights[i])), p)
    }

    fn value() -> impl Strategy<Value = f64> {
        prop_oneof![
            8 => -3.0..3.0,
            // Heavy tails crowd the rest into few buckets; repeated values are ties.
            1 => prop_oneof![Just(-1.7e308), Just(1e-300), Just(4e5), Just(1.7e308), Just(1.5)],
            1 => prop_oneof![Just(0.0), Just(-0.0), Just(f64::MIN_POSITIVE), Just(-5e-324)],
            1 => prop_oneof![Just(f64::INFINITY), Just(f64::NEG_INFINITY), Just(f64::NAN), Just(-f64::NAN)],
        ]
    }

    fn same(a: f64, b: f64) -> bool {
        a.to_bits() == b.to_bits()
    }

    proptest! {
        #![proptest_config(ProptestConfig {
            cases: 2000,
            rng_seed: RngSeed::Fixed(0x5EED_0016),
            failure_persistence: None,
            ..ProptestConfig::default()
        })]

        /// Weights that are multiples of 2⁻²⁰ summing to 1 make every partial sum exact, so the
        /// walk from the top must give the full sort's value exactly too, at any p (p on a
        /// partial sum included: ties of the cumulative weight).
        #[test]
        fn tail_quantiles_are_the_full_sorts_with_exact_sums(
            pairs in prop::collection::vec((value(), 1u32..5000), 1..300),
            finite in any::<bool>(),
            at in 0.0..1.0f64,
            on_a_sum in any::<bool>(),
        ) {
            let pairs: Vec<(f64, u32)> =
                if finite { pairs.into_iter().filter(|(x, _)| x.is_finite()).collect() } else { pairs };
            prop_assume!(!pairs.is_empty());
            let values: Vec<f64> = pairs.iter().map(|p| p.0).collect();
            let total: u32 = pairs.iter().map(|p| p.1).sum();
            // Scale the integer weights to sum to 2²⁰ exactly (the last one takes the rest).
            let mut units: Vec<u32> = pairs.iter().map(|p| (u64::from(p.1) * (1 << 20) / u64::from(total)) as u32).collect();
            let short = (1u32 << 20) - units.iter().sum::<u32>();
            *units.last_mut().expect("non-empty") += short;
            let weights: Vec<f64> = units.iter().map(|&u| f64::from(u) / f64::from(1u32 << 20)).collect();
            let draws = draws(weights.clone());
            let cut = (at * values.len() as f64) as usize;
            let p = if on_a_sum { units[..cut].iter().sum::<u32>().max(1) as f64 / f64::from(1u32 << 20) } else { at.max(1e-6) };
            for p in [p, 0.025, 0.975, 0.5] {
                let (ours, full) = (quantile(&draws, &values, p), by_full_sort(&values, &weights, p));
                prop_assert!(same(ours, full), "p {}: tail {}, full sort {}", p, ours, full);
            }
        }

        /// With any weights, the lower quantiles sum the same weights in the same order as the full
        /// sort: the same bits.
        #[test]
        fn lower_tail_quantiles_are_the_full_sorts(
            pairs in prop::collection::vec((value(), 1e-6..1.0f64), 1..300),
            p in 1e-6..=0.5f64,
        ) {
            let values: Vec<f64> = pairs.iter().map(|p| p.0).collect();
            let total: f64 = pairs.iter().map(|p| p.1).sum();
            let weights: Vec<f64> = pairs.iter().map(|p| p.1 / total).collect();
            let draws = draws(weights.clone());
            for p in [p, 0.025] {
                let (ours, full) = (quantile(&draws, &values, p), by_full_sort(&values, &weights, p));
                prop_assert!(same(ours, full), "p {}: tail {}, full sort {}", p, ours, full);
            }
        }
    }

    #[test]
    fn equal_and_nearly_equal_values() {
        for values in [
            vec![2.0],
            vec![1.0; 5],
            vec![1.0, 1.0 + f64::EPSILON, 1.0, 1.0],
            vec![5e-324, 0.0, 1e-323, -0.0, 5e-324],
        ] {
            // Binary fractions: exact partial sums, so the walk from the top must agree too.
            let weights = if values.len() == 5 {
                vec![0.25, 0.25, 0.125, 0.125, 0.25]
            } else {
                vec![1.0 / values.len() as f64; values.len()]
            };
            let draws = draws(weights.clone());
            for p in [0.025, 0.2, 0.5, 0.8, 0.975] {
                assert!(
                    same(quantile(&draws, &values, p), by_full_sort(&values, &weights, p)),
                    "{values:?} at {p}"
                );
            }
        }
    }
}
