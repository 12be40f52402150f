//! A mergeable quantile sketch with a relative-error guarantee.
//!
//! Positive values fall into logarithmic bins: with γ = (1 + α)/(1 − α), bin i holds
//! (γ^(i−1), γ^i] and is reported as 2γ^i/(γ + 1), which is within a relative α of every value
//! in the bin. This is the construction of DDSketch (Masson C, Rim JE, Lee HK. PVLDB
//! 2019;12(12):2195–2205; author order not confirmed). Counts are integers, so adding two
//! sketches is exact and gives the same sketch in any order: shards merge to exactly the
//! unsharded result. The memory is one counter per bin between the smallest and the largest
//! value seen (about 1,150 bins per decade at α = 0.1 %), whatever the number of values.
//!
//! A value's bin needs its logarithm and nothing else ([`Slot::of_ln`]), so a caller that knows
//! the logarithm as a sum — a sweep's exposure is an amount times the exposure to 1 mg — skips
//! the logarithm of the product: ln(X·u) = ln X + ln u, equal up to rounding, which can move a
//! value lying within a few units in the last place of a bin edge into the neighbouring bin
//! (as rounding in ln x itself can); the error bound is α plus those few ulps.

use crate::stats::nearest_rank;
use serde::{Deserialize, Serialize};

/// Relative accuracy α of every percentile the sketch reports: within 0.1 % of the exact
/// sample percentile.
pub const RELATIVE_ERROR: f64 = 0.001;

/// Values below this (mg/L or mg·h/L) are counted together and reported as 0, so that a
/// vanishing trough cannot stretch the bins over hundreds of decades.
pub const FLOOR: f64 = 1e-9;

/// ln γ, γ = (1 + α)/(1 − α).
fn ln_gamma() -> f64 {
    ((1.0 + RELATIVE_ERROR) / (1.0 - RELATIVE_ERROR)).ln()
}

/// ⌈y⌉ for |y| < 2³¹ (every bin index is), without the call to `ceil` that x86-64's baseline
/// instruction set needs, nor the clamping of `as i32`: adding 1.5·2⁵² rounds y to the nearest
/// integer n (in the low bits of the sum, two's complement), and ⌈y⌉ is n, or n + 1 when n < y.
fn ceil(y: f64) -> i32 {
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    let sum = y + SHIFT;
    let n = sum.to_bits() as i32;
    n + i32::from(sum - SHIFT < y)
}

/// Counts of values per logarithmic bin.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Sketch {
    /// Values below [`FLOOR`].
    below_floor: u64,
    /// Bin index of `counts[0]`.
    offset: i32,
    /// Counts of bins `offset`, `offset + 1`, …
    counts: Vec<u64>,
}

/// Where a value is counted: its bin, or below [`FLOOR`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Slot(Option<i32>);

impl Slot {
    /// The slot of a value given by its natural logarithm (−∞ for 0; NaN, for a negative value
    /// or NaN, counts below the floor).
    pub fn of_ln(ln_x: f64) -> Slot {
        if ln_x >= FLOOR.ln() { Slot(Some(bin(ln_x))) } else { Slot(None) }
    }
}

/// The bin of a value at or above [`FLOOR`], given by its natural logarithm.
fn bin(ln_x: f64) -> i32 {
    ceil(ln_x / ln_gamma())
}

impl Sketch {
    /// Count one value (finite, non-negative).
    pub fn add(&mut self, x: f64) {
        self.count_in(Slot::of_ln(x.ln()));
    }

    /// Count one value by its slot.
    pub fn count_in(&mut self, slot: Slot) {
        let Slot(Some(bin)) = slot else {
            self.below_floor += 1;
            return;
        };
        // The usual case, a bin within those already held, first (a negative index wraps to
        // a huge one and takes the general path).
        if let Some(count) = self.counts.get_mut(bin.wrapping_sub(self.offset) as u32 as usize) {
            *count += 1;
        } else {
            self.add_count(bin, 1);
        }
    }

    /// Count the values whose logarithms are those of `ln_x` plus `shift` each (a sweep's
    /// exposures: ln amount + ln(the exposure to 1 mg)), the smallest and largest of `ln_x`
    /// being `range`. Rounding is monotone, so the bins of the smallest and largest sums bound
    /// the others': room is made for them once, and each value then costs one counter.
    pub fn count_shifted(&mut self, ln_x: &[f64], shift: f64, range: (f64, f64)) {
        let (Slot(Some(lowest)), Slot(Some(highest))) =
            (Slot::of_ln(range.0 + shift), Slot::of_ln(range.1 + shift))
        else {
            // Some value is below the floor (or there is none).
            ln_x.iter().for_each(|l| self.count_in(Slot::of_ln(l + shift)));
            return;
        };
        // Both bins are counted below, so the sketch spans exactly the bins counted.
        self.add_count(lowest, 0);
        self.add_count(highest, 0);
        let (offset, counts) = (self.offset, &mut self.counts[..]);
        // The places of a batch first, in a loop the compiler vectorises, then the counts.
        let mut at = [0; 64];
        for batch in ln_x.chunks(at.len()) {
            at.iter_mut().zip(batch).for_each(|(a, l)| *a = bin(l + shift) - offset);
            at[..batch.len()].iter().for_each(|&a| counts[a as usize] += 1);
        }
    }

    fn add_count(&mut self, bin: i32, count: u64) {
        if self.counts.is_empty() {
            self.offset = bin;
            self.counts.push(0);
        } else if bin < self.offset {
            let grow = (self.offset - bin) as usize;
            self.counts.splice(0..0, std::iter::repeat_n(0, grow));
            self.offset = bin;
        }
        let at = (bin - self.offset) as usize;
        if at >= self.counts.len() {
            self.counts.resize(at + 1, 0);
        }
        self.counts[at] += count;
    }

    /// Add another sketch's counts (exact, order-independent).
    pub fn merge(&mut self, other: &Sketch) {
        self.below_floor += other.below_floor;
        for (i, &c) in other.counts.iter().enumerate() {
            if c > 0 {
                self.add_count(other.offset + i as i32, c);
            }
        }
    }

    /// Whether a sketch read from a file could have come from counting `n` values: its bins lie
    /// between those of [`FLOOR`] and the largest float, and its counts add up to `n` without
    /// overflow. A damaged shard file is refused instead of exhausting memory.
    pub fn holds(&self, n: u64) -> bool {
        let lowest = (FLOOR.ln() / ln_gamma()).ceil() as i64;
        let highest = (f64::MAX.ln() / ln_gamma()).ceil() as i64;
        let first = i64::from(self.offset);
        let last = first + self.counts.len() as i64 - 1;
        let total = self.counts.iter().try_fold(self.below_floor, |acc, &c| acc.checked_add(c));
        (self.counts.is_empty() || (first >= lowest && last <= highest)) && total == Some(n)
    }

    /// The number of values counted.
    pub fn count(&self) -> u64 {
        self.below_floor + self.counts.iter().sum::<u64>()
    }

    /// The `percent`-th percentile by the nearest-rank definition ([`crate::stats`]: the value
    /// of rank ⌈percent·n/100⌉ in sorted order, at least rank 1), within [`RELATIVE_ERROR`];
    /// `None` when empty.
    pub fn percentile(&self, percent: u32) -> Option<f64> {
        let n = self.count();
        if n == 0 {
            return None;
        }
        let rank = nearest_rank(n, percent);
        if rank <= self.below_floor {
            return Some(0.0);
        }
        let mut seen = self.below_floor;
        let gamma = ln_gamma().exp();
        for (i, &c) in self.counts.iter().enumerate() {
            seen += c;
            if seen >= rank {
                let bin = f64::from(self.offset + i as i32);
                return Some(2.0 * (bin * ln_gamma()).exp() / (gamma + 1.0));
            }
        }
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::rngs::StdRng;
    use rand::{RngExt, SeedableRng};

    /// The exact nearest-rank percentile of a sample.
    fn exact(sorted: &[f64], percent: u32) -> f64 {
        sorted[nearest_rank(sorted.len() as u64, percent) as usize - 1]
    }

    #[test]
    fn the_bin_index_is_the_ceiling() {
        let mut rng = StdRng::seed_from_u64(3);
        let mut ys: Vec<f64> = (0..10_000).map(|_| rng.random_range(-400_000.0..400_000.0)).collect();
        ys.extend([0.0, -0.0, 1.0, -1.0, 0.5, -0.5, 354_891.0, -20_723.0, 1e-300, -1e-300]);
        for y in ys {
            assert_eq!(ceil(y), y.ceil() as i32, "{y}");
        }
    }

    #[test]
    fn values_counted_by_their_shifted_logarithms_fill_the_same_sketch() {
        let mut rng = StdRng::seed_from_u64(5);
        let ln_x: Vec<f64> = (0..5_000).map(|_| rng.random_range(-12.0..9.0)).collect();
        let range =
            |v: &[f64]| v.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &l| (a.min(l), b.max(l)));
        // Every value above the floor; then some below it (the shift takes them there).
        for (shift, below) in [(1.7, false), (-9.5, true)] {
            let mut one_by_one = Sketch::default();
            ln_x.iter().for_each(|l| one_by_one.count_in(Slot::of_ln(l + shift)));
            let mut shifted = Sketch::default();
            for part in ln_x.chunks(700) {
                shifted.count_shifted(part, shift, range(part));
            }
            assert_eq!(shifted, one_by_one, "shift {shift}");
            assert_eq!(one_by_one.below_floor > 0, below);
        }
    }

    #[test]
    fn a_damaged_sketch_is_recognised() {
        let mut s = Sketch::default();
        for x in [0.0, 1e-3, 2.5, 40.0, 1e6] {
            s.add(x);
        }
        assert!(s.holds(5));
        assert!(!s.holds(4));
        let far = Sketch { below_floor: 0, offset: i32::MAX - 1, counts: vec![1, 1] };
        assert!(!far.holds(2));
        let low = Sketch { below_floor: 0, offset: i32::MIN, counts: vec![1] };
        assert!(!low.holds(1));
        let overflow = Sketch { below_floor: u64::MAX, offset: 0, counts: vec![1] };
        assert!(!overflow.holds(0));
    }

    #[test]
    fn percentiles_are_within_the_relative_error_of_the_sample_percentiles() {
        let mut rng = StdRng::seed_from_u64(7);
        // Values spread over six decades, some below the floor.
        let mut values: Vec<f64> = (0..20_000).map(|_| 10f64.powf(rng.random_range(-3.0..3.0))).collect();
        values.extend([0.0, 1e-12]);
        let mut sketch = Sketch::default();
        values.iter().for_each(|&x| sketch.add(x));
        values.sort_by(f64::total_cmp);
        assert_eq!(sketch.count(), values.len() as u64);
        for percent in [0, 1, 5, 25, 50, 75, 95, 99, 100] {
            let (got, want) = (sketch.percentile(percent).unwrap(), exact(&values, percent));
            // The guarantee |got/want − 1| ≤ α, with room for rounding at a bin edge.
            assert!((got - want).abs() <= (RELATIVE_ERROR + 1e-12) * want, "p{percent}: {got} vs {want}");
        }
        assert!(sketch.percentile(0).unwrap().abs() < f64::MIN_POSITIVE, "below the floor reads as 0");
        assert_eq!(Sketch::default().percentile(50), None);
    }

    #[test]
    fn merging_is_exact_and_order_independent() {
        let mut rng = StdRng::seed_from_u64(11);
        let values: Vec<f64> = (0..3_000).map(|_| rng.random_range(0.5..500.0)).collect();
        let mut whole = Sketch::default();
        values.iter().for_each(|&x| whole.add(x));
        let parts: Vec<Sketch> = values
            .chunks(700)
            .map(|c| {
                let mut s = Sketch::default();
                c.iter().for_each(|&x| s.add(x));
                s
            })
            .collect();
        let mut forward = Sketch::default();
        parts.iter().for_each(|p| forward.merge(p));
        let mut backward = Sketch::default();
        parts.iter().rev().for_each(|p| backward.merge(p));
        assert_eq!(forward, whole);
        assert_eq!(backward, whole);
    }
}
