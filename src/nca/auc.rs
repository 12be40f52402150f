//! Areas under a sampled curve: the trapezoid rules, the area of the first moment (AUMC), and
//! the area between any two times (partial AUCs, AUC over a dosing interval), interpolated
//! within the samples by the rule's own step and extrapolated past the last one along the
//! terminal line.
//!
//! Over one step from (t₁, C₁) to (t₂, C₂), Δt = t₂ − t₁:
//! - linear: Δt·(C₁ + C₂)/2, and for the moment Δt·(t₁C₁ + t₂C₂)/2;
//! - logarithmic (the curve taken as C₁·e^(−k(t − t₁)), k = ln(C₁/C₂)/Δt): Δt·(C₁ − C₂)/ln(C₁/C₂),
//!   and for the moment (t₁C₁ − t₂C₂)/k + (C₁ − C₂)/k² (Yeh & Kwan 1978 compare the rules).
//!
//! The logarithmic step is exact on an exponential decline, which is what a one-compartment
//! curve does between doses once absorption or infusion is over; it needs two positive,
//! different levels.

use crate::choice::choice_enum;
use crate::nca::lambda_z::Terminal;

choice_enum! {
    /// How the area between two levels is computed.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum AucRule: "AUC rule" {
        /// Logarithmic steps where the level falls, linear where it rises or stays (default: exact on an exponential decline, never a log step from zero).
        LinearUpLogDown = "linear-up-log-down",
        /// Linear steps up to the peak, logarithmic steps after it.
        LinearLog = "linear-log",
        /// Linear steps everywhere (the plain trapezoid rule).
        Linear = "linear",
    }
}

/// One level of a profile: time after the dose (h) and concentration (mg/L).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sample {
    /// Time after the dose (h).
    pub t: f64,
    /// Concentration (mg/L).
    pub c: f64,
}

/// The curve that a rule draws through a profile's samples: what the areas integrate.
#[derive(Debug, Clone, Copy)]
pub struct Curve<'a> {
    /// The samples, sorted by time, times distinct.
    pub samples: &'a [Sample],
    /// The rule for each step.
    pub rule: AucRule,
    /// The time of the peak (for the linear-log rule).
    pub tmax: f64,
    /// The terminal line, for areas past the last sample.
    pub terminal: Option<&'a Terminal>,
}

/// ln(a/b) for positive a, b: through ln(1 + (a − b)/b) when they are close (where a/b would
/// lose the difference), through a/b otherwise (where ln(1 + x) near x = −1 would lose it).
fn ln_ratio(a: f64, b: f64) -> f64 {
    if (a - b).abs() < 0.5 * b { ((a - b) / b).ln_1p() } else { (a / b).ln() }
}

impl Curve<'_> {
    /// Whether the step from `a` to `b` is logarithmic under the rule.
    fn log_step(&self, a: Sample, b: Sample) -> bool {
        let positive_and_different = a.c > 0.0 && b.c > 0.0 && a.c.total_cmp(&b.c).is_ne();
        match self.rule {
            AucRule::Linear => false,
            AucRule::LinearUpLogDown => positive_and_different && b.c < a.c,
            AucRule::LinearLog => positive_and_different && a.t >= self.tmax,
        }
    }

    /// The level at `t` within the step from `a` to `b`, by the step's own interpolation.
    fn within(&self, a: Sample, b: Sample, t: f64) -> f64 {
        let share = (t - a.t) / (b.t - a.t);
        if self.log_step(a, b) { a.c * (share * ln_ratio(b.c, a.c)).exp() } else { a.c + share * (b.c - a.c) }
    }

    /// Area and first moment from `a` to `b` along a logarithmic (`log`) or linear step.
    fn step(a: Sample, b: Sample, log: bool) -> (f64, f64) {
        let dt = b.t - a.t;
        // A clipped piece too short to tell its ends apart is a linear step.
        if log && a.c > 0.0 && b.c > 0.0 && a.c.total_cmp(&b.c).is_ne() {
            let k = ln_ratio(a.c, b.c) / dt;
            ((a.c - b.c) / k, (a.t * a.c - b.t * b.c) / k + (a.c - b.c) / (k * k))
        } else {
            (dt * (a.c + b.c) / 2.0, dt * (a.t * a.c + b.t * b.c) / 2.0)
        }
    }

    /// The area (mg·h/L) and first moment (mg·h²/L) between `from` and `to` (times after the
    /// dose, `from` ≤ `to`): `None` when the interval starts before the first sample, or ends
    /// after the last one without a terminal line to follow (or after a last sample of zero).
    pub fn area(&self, from: f64, to: f64) -> Option<(f64, f64)> {
        let (first, last) = (self.samples.first()?, self.samples.last()?);
        if from < first.t || from > to {
            return None;
        }
        let (mut auc, mut aumc) = (0.0, 0.0);
        for pair in self.samples.windows(2) {
            let (a, b) = (pair[0], pair[1]);
            let (lo, hi) = (a.t.max(from), b.t.min(to));
            if lo >= hi {
                continue;
            }
            let start = Sample { t: lo, c: self.within(a, b, lo) };
            let end = Sample { t: hi, c: self.within(a, b, hi) };
            // A clipped piece follows its whole step's curve.
            let (x, m) = Self::step(start, end, self.log_step(a, b));
            auc += x;
            aumc += m;
        }
        if to > last.t {
            let (x, m) = self.tail(last, from.max(last.t), to)?;
            auc += x;
            aumc += m;
        }
        Some((auc, aumc))
    }

    /// Area and moment past the last sample `last`, from `lo` to `hi` (∞ allowed), along
    /// C(t) = C_last·e^(−λz(t − t_last)).
    fn tail(&self, last: &Sample, lo: f64, hi: f64) -> Option<(f64, f64)> {
        let terminal = self.terminal?;
        if last.c <= 0.0 {
            return None;
        }
        let k = terminal.lambda_z_per_h;
        // ∫ C dt = C(t)/k and ∫ t·C dt = t·C(t)/k + C(t)/k², each taken from lo to hi.
        let at = |t: f64| {
            if t.is_infinite() {
                (0.0, 0.0)
            } else {
                let c = last.c * (-k * (t - last.t)).exp();
                (c / k, t * c / k + c / (k * k))
            }
        };
        let (a, b) = (at(lo), at(hi));
        Some((a.0 - b.0, a.1 - b.1))
    }

    /// The level at `t` (interpolated within the samples, or on the terminal line past them).
    pub fn level_at(&self, t: f64) -> Option<f64> {
        let (first, last) = (self.samples.first()?, self.samples.last()?);
        if t < first.t {
            return None;
        }
        if t > last.t {
            let terminal = self.terminal?;
            return (last.c > 0.0).then(|| last.c * (-terminal.lambda_z_per_h * (t - last.t)).exp());
        }
        let i = self.samples.partition_point(|s| s.t < t);
        let b = self.samples[i];
        if i == 0 || b.t <= t {
            return Some(b.c);
        }
        Some(self.within(self.samples[i - 1], b, t))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn curve(samples: &[Sample], rule: AucRule) -> Curve<'_> {
        Curve { samples, rule, tmax: 0.0, terminal: None }
    }

    #[test]
    fn a_log_step_is_exact_on_an_exponential_and_its_clipped_pieces_add_up() {
        // C = 10·e^(−0.3t): ∫₁⁴ C dt = (10/0.3)(e^(−0.3) − e^(−1.2)), closed form.
        let c = |t: f64| 10.0 * (-0.3 * t).exp();
        let s = [Sample { t: 1.0, c: c(1.0) }, Sample { t: 4.0, c: c(4.0) }];
        let k = curve(&s, AucRule::LinearUpLogDown);
        let exact = 10.0 / 0.3 * ((-0.3f64).exp() - (-1.2f64).exp());
        let (whole, _) = k.area(1.0, 4.0).unwrap();
        assert!((whole - exact).abs() < 1e-13 * exact);
        let (p1, _) = k.area(1.0, 2.5).unwrap();
        let (p2, _) = k.area(2.5, 4.0).unwrap();
        assert!((p1 + p2 - exact).abs() < 1e-13 * exact);
        assert!((k.level_at(2.5).unwrap() - c(2.5)).abs() < 1e-13);
    }

    #[test]
    fn an_area_outside_the_samples_without_a_terminal_line_is_undefined() {
        let s = [Sample { t: 0.0, c: 0.0 }, Sample { t: 1.0, c: 2.0 }];
        let k = curve(&s, AucRule::Linear);
        assert!(k.area(0.0, 2.0).is_none());
        assert!(k.area(-1.0, 1.0).is_none());
        assert!((k.area(0.0, 1.0).unwrap().0 - 1.0).abs() < 1e-15);
    }
}
