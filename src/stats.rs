//! Sample percentiles, defined once.
//!
//! **The definition.** The p-quantile (0 ≤ p ≤ 1) of a sample whose values carry weights
//! summing to 1 is the smallest value at which the cumulative weight, taken in ascending order
//! of value, reaches p: the inverse of the empirical distribution function. With n equal
//! weights it is the nearest-rank percentile, the value of rank ⌈p·n⌉ (at least 1).
//! [`weighted_quantile`] computes it over weighted draws (the fit's posterior intervals, the
//! next-level advisor's 90 % widths); [`nearest_rank`] gives its rank in exact integer
//! arithmetic for counted values, which the sweep's sketch reads off its bins within its
//! stated relative error (`sweep::sketch::RELATIVE_ERROR`, 0.1 %: the sketch reports a bin's
//! representative value, not a sample value).
//!
//! **The exception.** Planning's prediction bands (`plan::recommend::Band`: the median and
//! 5th–95th percentiles over the posterior draws in `plan`'s output and the report) interpolate
//! linearly between order statistics ([`interpolated_quantile`], "type 7"). It lies between the
//! sorted neighbours of the nearest-rank value, so the two differ by at most one gap between
//! neighbouring draws. It is kept so that `plan`'s numbers do not change.

/// The weighted p-quantile of values given as (value, weight) in ascending order of value, with
/// weights summing to 1: the first value at which the cumulative weight reaches `p`. When
/// rounding leaves the total just short of `p`, the largest value; NaN for no values.
pub fn weighted_quantile(sorted: impl IntoIterator<Item = (f64, f64)>, p: f64) -> f64 {
    let mut cumulative = 0.0;
    let mut last = f64::NAN;
    for (value, weight) in sorted {
        cumulative += weight;
        if cumulative >= p {
            return value;
        }
        last = value;
    }
    last
}

/// The 1-based rank of the `percent`-th percentile among `n` ≥ 1 equally weighted values:
/// ⌈percent·n/100⌉, at least 1 (exact, without floating point).
pub fn nearest_rank(n: u64, percent: u32) -> u64 {
    ((u128::from(percent) * u128::from(n)).div_ceil(100) as u64).clamp(1, n)
}

/// The p-quantile of a non-empty sorted sample by linear interpolation between order
/// statistics ("type 7"): position h = p·(n − 1), value x⌊h⌋ + (h − ⌊h⌋)·(x⌊h⌋+1 − x⌊h⌋).
/// Used only by planning's prediction bands (see the module documentation). NaN for no values.
pub fn interpolated_quantile(sorted: &[f64], p: f64) -> f64 {
    interpolated_quantile_of(sorted.len(), p, |k| sorted[k])
}

/// [`interpolated_quantile`] of the `n` values `at(0) ≤ … ≤ at(n − 1)`, reading only the two
/// order statistics it needs: a band of values that are a sorted sample scaled by a positive
/// factor needs neither the scaled sample nor a sort.
pub fn interpolated_quantile_of(n: usize, p: f64, at: impl Fn(usize) -> f64) -> f64 {
    if n == 0 {
        return f64::NAN;
    }
    let (i, frac) = position(n, p);
    let (value, next) = (at(i), at((i + 1).min(n - 1)));
    value + frac * (next - value)
}

/// [`interpolated_quantile`] of values in any order, found by selection instead of a sort
/// (the values are reordered): the same two order statistics, so the same value.
pub fn selected_quantile(values: &mut [f64], p: f64) -> f64 {
    if values.is_empty() {
        return f64::NAN;
    }
    let (i, frac) = position(values.len(), p);
    let (_, &mut value, above) = values.select_nth_unstable_by(i, f64::total_cmp);
    let next = above.iter().copied().min_by(f64::total_cmp).unwrap_or(value);
    value + frac * (next - value)
}

/// The 0-based order statistic below the interpolated p-quantile of `n` ≥ 1 values, and the
/// fraction of the way to the next.
fn position(n: usize, p: f64) -> (usize, f64) {
    let h = (p.clamp(0.0, 1.0) * (n - 1) as f64).max(0.0);
    (h.floor() as usize, h - h.floor())
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // quantiles are sample values
mod tests {
    use super::*;

    #[test]
    fn equal_weights_give_the_nearest_rank() {
        // Sixteen values, so that the cumulative weights k/16 are exact.
        let sorted: Vec<f64> = (1..=16).map(|i| f64::from(i * i)).collect();
        for percent in [0, 1, 5, 25, 50, 75, 95, 99, 100] {
            let rank = nearest_rank(16, percent);
            let p = f64::from(percent) / 100.0;
            let weighted = weighted_quantile(sorted.iter().map(|&x| (x, 1.0 / 16.0)), p);
            assert_eq!(weighted, sorted[rank as usize - 1], "p{percent}");
        }
        assert!(weighted_quantile([], 0.5).is_nan());
    }

    #[test]
    fn interpolation_lies_between_neighbouring_values() {
        let sorted = [1.0, 2.0, 4.0, 8.0];
        assert_eq!(interpolated_quantile(&sorted, 0.5), 3.0);
        assert_eq!(interpolated_quantile(&sorted, 0.0), 1.0);
        assert_eq!(interpolated_quantile(&sorted, 1.0), 8.0);
        assert_eq!(interpolated_quantile(&[5.0], 0.95), 5.0);
        // Within the sorted neighbours of the nearest-rank value, for every sample size.
        for n in 1..=60u64 {
            let sorted: Vec<f64> = (0..n).map(|i| (i as f64).powf(1.5)).collect();
            for percent in [0, 1, 5, 10, 25, 50, 75, 90, 95, 99, 100] {
                let at = |rank: u64| sorted[(rank.clamp(1, n) - 1) as usize];
                let rank = nearest_rank(n, percent);
                let x = interpolated_quantile(&sorted, f64::from(percent) / 100.0);
                assert!(at(rank - 1) <= x && x <= at(rank + 1), "n {n}, p{percent}: {x}");
            }
        }
    }

    #[test]
    fn selection_and_scaled_order_statistics_give_the_sorted_sample_s_value_to_the_bit() {
        // Shuffled values with ties and both zeros, every sample size, a factor that rounds.
        for n in 1..=80usize {
            let values: Vec<f64> =
                (0..n).map(|i| [((i * 37) % 11) as f64 / 3.0, 0.0, -0.0][i % 3] + (i % 5) as f64).collect();
            let mut sorted = values.clone();
            sorted.sort_by(f64::total_cmp);
            for p in [0.0, 0.05, 0.1, 0.5, 0.9, 0.95, 1.0] {
                let expected = interpolated_quantile(&sorted, p);
                let mut shuffled = values.clone();
                assert_eq!(selected_quantile(&mut shuffled, p).to_bits(), expected.to_bits(), "n {n}, p {p}");
                let scale = 1.7;
                let mut scaled: Vec<f64> = values.iter().map(|v| v * scale).collect();
                scaled.sort_by(f64::total_cmp);
                let read = interpolated_quantile_of(n, p, |k| sorted[k] * scale);
                assert_eq!(read.to_bits(), interpolated_quantile(&scaled, p).to_bits(), "n {n}, p {p}");
            }
        }
        assert!(selected_quantile(&mut [], 0.5).is_nan());
    }
}
