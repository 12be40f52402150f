//! The number type the engine computes in.
//!
//! The engine is written once, generic over [`Real`], so that the same exact solution gives
//! plain values (`f64`) and, for the fitter, exact first derivatives by forward-mode
//! automatic differentiation ([`Dual`]). Branches (series versus closed form) look only at
//! the value part, so both types follow the same path.

use std::ops::{Add, AddAssign, Div, Mul, Neg, Sub};

/// The operations the engine needs from a number.
pub trait Real:
    Copy
    + Add<Output = Self>
    + Sub<Output = Self>
    + Mul<Output = Self>
    + Div<Output = Self>
    + Neg<Output = Self>
    + AddAssign
    + Add<f64, Output = Self>
    + Mul<f64, Output = Self>
{
    /// A constant (zero derivative).
    fn cst(v: f64) -> Self;
    /// The value part.
    fn val(self) -> f64;
    /// e^x.
    fn exp(self) -> Self;
    /// e^x − 1, accurate near 0.
    fn exp_m1(self) -> Self;
    /// ln(1 + x), accurate near 0.
    fn ln_1p(self) -> Self;
    /// ln x.
    fn ln(self) -> Self;
    /// √x.
    fn sqrt(self) -> Self;
    /// A function of this number given its value and slope at `self.val()` (the chain rule).
    fn through(self, value: f64, slope: f64) -> Self;
}

impl Real for f64 {
    fn cst(v: f64) -> Self {
        v
    }
    fn val(self) -> f64 {
        self
    }
    fn exp(self) -> Self {
        f64::exp(self)
    }
    fn exp_m1(self) -> Self {
        f64::exp_m1(self)
    }
    fn ln_1p(self) -> Self {
        f64::ln_1p(self)
    }
    fn ln(self) -> Self {
        f64::ln(self)
    }
    fn sqrt(self) -> Self {
        f64::sqrt(self)
    }
    fn through(self, value: f64, _slope: f64) -> Self {
        value
    }
}

/// A value with its gradient with respect to `N` inputs (forward-mode differentiation).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Dual<const N: usize> {
    /// The value.
    pub v: f64,
    /// ∂value/∂input_i.
    pub d: [f64; N],
}

impl<const N: usize> Dual<N> {
    /// The `i`-th input variable with value `v` (derivative 1 with respect to itself).
    pub fn var(v: f64, i: usize) -> Self {
        let mut d = [0.0; N];
        d[i] = 1.0;
        Dual { v, d }
    }

    /// Apply a function with value `f` and derivative `df` at `self.v` (chain rule).
    fn chain(self, f: f64, df: f64) -> Self {
        Dual { v: f, d: self.d.map(|x| x * df) }
    }
}

impl<const N: usize> Add for Dual<N> {
    type Output = Self;
    fn add(self, o: Self) -> Self {
        Dual { v: self.v + o.v, d: std::array::from_fn(|i| self.d[i] + o.d[i]) }
    }
}

impl<const N: usize> AddAssign for Dual<N> {
    fn add_assign(&mut self, o: Self) {
        *self = *self + o;
    }
}

impl<const N: usize> Sub for Dual<N> {
    type Output = Self;
    fn sub(self, o: Self) -> Self {
        Dual { v: self.v - o.v, d: std::array::from_fn(|i| self.d[i] - o.d[i]) }
    }
}

// The product and quotient rules mix operators by nature.
#[allow(clippy::suspicious_arithmetic_impl)]
impl<const N: usize> Mul for Dual<N> {
    type Output = Self;
    fn mul(self, o: Self) -> Self {
        Dual { v: self.v * o.v, d: std::array::from_fn(|i| self.d[i] * o.v + self.v * o.d[i]) }
    }
}

#[allow(clippy::suspicious_arithmetic_impl)]
impl<const N: usize> Div for Dual<N> {
    type Output = Self;
    fn div(self, o: Self) -> Self {
        let q = self.v / o.v;
        Dual { v: q, d: std::array::from_fn(|i| (self.d[i] - q * o.d[i]) / o.v) }
    }
}

impl<const N: usize> Neg for Dual<N> {
    type Output = Self;
    fn neg(self) -> Self {
        Dual { v: -self.v, d: self.d.map(|x| -x) }
    }
}

impl<const N: usize> Add<f64> for Dual<N> {
    type Output = Self;
    fn add(self, o: f64) -> Self {
        Dual { v: self.v + o, d: self.d }
    }
}

impl<const N: usize> Mul<f64> for Dual<N> {
    type Output = Self;
    fn mul(self, o: f64) -> Self {
        Dual { v: self.v * o, d: self.d.map(|x| x * o) }
    }
}

impl<const N: usize> Real for Dual<N> {
    fn cst(v: f64) -> Self {
        Dual { v, d: [0.0; N] }
    }
    fn val(self) -> f64 {
        self.v
    }
    fn exp(self) -> Self {
        let e = self.v.exp();
        self.chain(e, e)
    }
    fn exp_m1(self) -> Self {
        self.chain(self.v.exp_m1(), self.v.exp())
    }
    fn ln_1p(self) -> Self {
        self.chain(self.v.ln_1p(), 1.0 / (1.0 + self.v))
    }
    fn ln(self) -> Self {
        self.chain(self.v.ln(), 1.0 / self.v)
    }
    fn sqrt(self) -> Self {
        let s = self.v.sqrt();
        self.chain(s, 0.5 / s)
    }
    fn through(self, value: f64, slope: f64) -> Self {
        self.chain(value, slope)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dual_derivatives_match_calculus() {
        // d/dx [x·e^x / (1 + x)] at x = 0.7 = e^x (x² + x + 1) / (1 + x)²
        let x = Dual::<1>::var(0.7, 0);
        let y = x * x.exp() / (x + 1.0);
        let exact = 0.7f64.exp() * (0.49 + 0.7 + 1.0) / 1.7f64.powi(2);
        assert!((y.d[0] - exact).abs() < 1e-14);
        let z = x.ln_1p() + x.exp_m1() - x.sqrt() * x.ln();
        let exact = 1.0 / 1.7 + 0.7f64.exp() - (0.5 / 0.7f64.sqrt() * 0.7f64.ln() + 0.7f64.sqrt() / 0.7);
        assert!((z.d[0] - exact).abs() < 1e-14);
    }
}
