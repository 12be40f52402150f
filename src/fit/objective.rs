//! Objective functions over log-parameters θ = (ln CL, ln V[, ln ka]).
//!
//! MAP (Sheiner LB, Beal SL. J Pharm Sci 1982;71:1344–1348; issue number not confirmed),
//! the −2 log posterior up to a constant:
//!
//! ```text
//! Σ_quantified [ln(2π σᵢ²) + (yᵢ − fᵢ)²/σᵢ²]  +  Σ_BLQ −2 ln Φ((LLOQᵢ − fᵢ)/σᵢ)  +  ηᵀ Ω⁻¹ η
//! σᵢ² = a² + (b·fᵢ)²,   η = θ − ln θ_typ(covariates)
//! ```
//!
//! The below-limit term is the M3 method (Beal SL. J Pharmacokinet Pharmacodyn 2001;28:481).
//! Weighted least squares: Σ wᵢ (yᵢ − fᵢ)² with wᵢ = 1, 1/yᵢ or 1/yᵢ². Predictions and their
//! exact gradients come from the engine run on dual numbers.

use super::linalg::{MAX, Mat};
use crate::choice::choice_enum;
use crate::dosing::Dose;
use crate::engine::scalar::{Dual, Real};
use crate::engine::schedule::{LaneFactors, Schedule};
use crate::engine::{Events, Kinetics};
use crate::io::levels::Level;
use crate::model::Residual;
use std::f64::consts::{PI, SQRT_2};

/// A number carrying the gradient with respect to the (at most three) log-parameters.
pub(crate) type D3 = Dual<MAX>;

/// ln Φ(x), accurate far into the lower tail.
pub(crate) fn ln_norm_cdf(x: f64) -> f64 {
    if x > -30.0 {
        (0.5 * statrs::function::erf::erfc(-x / SQRT_2)).ln()
    } else {
        // Asymptotic series of the Mills ratio (Abramowitz & Stegun 26.2.12).
        let z2 = 1.0 / (x * x);
        -0.5 * x * x - (-x).ln() - 0.5 * (2.0 * PI).ln()
            + (1.0 - z2 + 3.0 * z2 * z2 - 15.0 * z2 * z2 * z2).ln()
    }
}

/// d/dx ln Φ(x) = φ(x)/Φ(x).
pub(crate) fn ln_norm_cdf_slope(x: f64) -> f64 {
    if x > -30.0 {
        (-0.5 * x * x - 0.5 * (2.0 * PI).ln() - ln_norm_cdf(x)).exp()
    } else {
        let z2 = 1.0 / (x * x);
        -x / (1.0 - z2 + 3.0 * z2 * z2 - 15.0 * z2 * z2 * z2)
    }
}

/// −2 ln L of one quantified level: ln(2π σ²) + ((y − f)/σ)².
pub fn quantified_term<R: Real>(y: f64, f: R, var: R) -> R {
    let (two_pi_var, squared) = quantified_parts(y, f, var);
    two_pi_var.ln() + squared
}

/// The two parts of [`quantified_term`]: 2π σ², whose logarithm it adds, and ((y − f)/σ)².
#[inline(always)]
fn quantified_parts<R: Real>(y: f64, f: R, var: R) -> (R, R) {
    let r = R::cst(y) - f;
    (var * (2.0 * PI), r * r / var)
}

/// −2 ln L of one level below the limit (M3): −2 ln Φ((LLOQ − f)/σ).
pub fn blq_term<R: Real>(lloq: f64, f: R, var: R) -> R {
    let z = (R::cst(lloq) - f) / var.sqrt();
    let zv = z.val();
    z.through(ln_norm_cdf(zv), ln_norm_cdf_slope(zv)) * -2.0
}

/// −2 ln L of one level with prediction `f` and residual variance `var`: the normal density of
/// a quantified level, M3 for one below the limit.
///
/// Zero variance (a proportional-only error where the prediction is 0) makes the level's
/// distribution a point mass at the prediction: a level there (0, or below its limit) is
/// certain and adds a constant, dropped; any other value is impossible (+∞).
pub(crate) fn level_term<R: Real>(level: &Level, f: R, var: R) -> R {
    if var.val() > 0.0 {
        return match (level.conc_mg_l, level.lloq_mg_l) {
            (Some(y), _) => quantified_term(y, f, var),
            (None, Some(lloq)) => blq_term(lloq, f, var),
            (None, None) => R::cst(0.0),
        };
    }
    let possible = match (level.conc_mg_l, level.lloq_mg_l) {
        (Some(y), _) => y.abs() <= f64::MIN_POSITIVE,
        (None, Some(lloq)) => lloq > 0.0,
        (None, None) => true,
    };
    R::cst(if possible { 0.0 } else { f64::INFINITY })
}

choice_enum! {
    /// How residuals are weighted in least squares.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
    pub enum Weighting: "weighting" {
        /// Equal weights.
        None = "none",
        /// wᵢ = 1/yᵢ.
        InvY = "1/y",
        /// wᵢ = 1/yᵢ².
        InvY2 = "1/y^2",
    }
}

/// The data part of an objective.
#[derive(Debug, Clone)]
pub enum Likelihood {
    /// Residual-error likelihood with M3 for levels below the limit.
    Bayes(Residual),
    /// Weighted sum of squares over quantified levels.
    LeastSquares(Weighting),
}

/// A Gaussian prior on θ.
#[derive(Debug, Clone)]
pub struct Prior {
    /// Prior mean of θ: ln of the covariate-adjusted typical values.
    pub mean: [f64; MAX],
    /// Ω⁻¹.
    pub precision: Mat,
}

/// The parameters that are not estimated, and how many are.
#[derive(Debug, Clone, Copy)]
pub struct Fixed {
    /// Number of estimated parameters: 2 (ln CL, ln V) or 3 (with ln ka).
    pub n: usize,
    /// ka when it is held fixed (1/h).
    pub ka_per_h: Option<f64>,
    /// Bioavailability.
    pub f: f64,
    /// Lag time (h).
    pub tlag_h: f64,
}

/// Everything one subject's objective needs, prepared once.
#[derive(Debug, Clone)]
pub struct Problem {
    /// The walk to the levels' times, recorded once for the many evaluations.
    schedule: Schedule,
    levels: Vec<Level>,
    /// Number of estimated parameters (2, or 3 with ka).
    pub n: usize,
    fixed: Fixed,
    /// The data part.
    pub likelihood: Likelihood,
    /// The prior (MAP only).
    pub prior: Option<Prior>,
}

impl Problem {
    /// Prepare a subject's objective. `levels` must be sorted by time.
    pub fn new(
        doses: &[Dose],
        levels: &[Level],
        fixed: Fixed,
        likelihood: Likelihood,
        prior: Option<Prior>,
    ) -> Problem {
        let levels: Vec<Level> = match likelihood {
            Likelihood::LeastSquares(_) => levels.iter().filter(|l| !l.is_blq()).copied().collect(),
            Likelihood::Bayes(_) => levels.to_vec(),
        };
        let times: Vec<f64> = levels.iter().map(|l| l.time_h).collect();
        Problem {
            schedule: Schedule::new(&Events::new(doses, fixed.tlag_h), &times),
            levels,
            n: fixed.n,
            fixed,
            likelihood,
            prior,
        }
    }

    /// The levels the objective uses.
    pub(crate) fn levels(&self) -> &[Level] {
        &self.levels
    }

    /// CL, V and ka at θ: e^θ for the estimated ones, the fixed ka otherwise.
    fn parameters<R: Real>(&self, theta: &[R]) -> [R; MAX] {
        let ka = if self.n == 3 { theta[2].exp() } else { R::cst(self.fixed.ka_per_h.unwrap_or(f64::NAN)) };
        [theta[0].exp(), theta[1].exp(), ka]
    }

    fn kinetics<R: Real>(&self, [cl, v, ka]: [R; MAX]) -> Kinetics<R> {
        Kinetics { k: cl / v, v, ka, f: R::cst(self.fixed.f), tlag_h: self.fixed.tlag_h }
    }

    /// Predicted concentrations at the levels' times.
    pub(crate) fn predictions<R: Real>(&self, theta: &[R]) -> Vec<R> {
        let mut out = Vec::with_capacity(self.levels.len());
        self.schedule.run(self.kinetics(self.parameters(theta)), |fi| out.push(fi));
        out
    }

    /// The objective at θ, in any number type.
    pub(crate) fn value<R: Real>(&self, theta: &[R]) -> R {
        self.value_with(theta, self.parameters(theta))
    }

    /// The objective at θ given its `parameters` (CL, V, ka).
    fn value_with<R: Real>(&self, theta: &[R], parameters: [R; MAX]) -> R {
        let mut total = R::cst(0.0);
        let mut levels = self.levels.iter();
        self.schedule.run(self.kinetics(parameters), |fi| {
            if let Some(level) = levels.next() {
                total += self.level_cost(level, fi);
            }
        });
        self.with_prior(total, theta)
    }

    /// The data term of one level with prediction `fi`.
    #[inline(always)]
    fn level_cost<R: Real>(&self, level: &Level, fi: R) -> R {
        match &self.likelihood {
            Likelihood::Bayes(res) => level_term(level, fi, variance(res, fi)),
            Likelihood::LeastSquares(w) => {
                let y = level.conc_mg_l.unwrap_or(0.0);
                let r = R::cst(y) - fi;
                r * r * weight(*w, y)
            }
        }
    }

    /// `total` with the prior's term at θ added (MAP only).
    #[inline(always)]
    fn with_prior<R: Real>(&self, mut total: R, theta: &[R]) -> R {
        if let Some(prior) = &self.prior {
            for i in 0..self.n {
                for j in 0..self.n {
                    let p = prior.precision[i][j];
                    if p != 0.0 {
                        total += (theta[i] + -prior.mean[i]) * (theta[j] + -prior.mean[j]) * p;
                    }
                }
            }
        }
        total
    }

    /// Objective value (f64).
    pub fn cost(&self, theta: &[f64]) -> f64 {
        self.value(theta)
    }

    /// The objective value (f64) at `LANES` points θ at once, with the parameters CL, V and ka
    /// it computed at each (e^θ, or the fixed ka: a caller that needs both computes the
    /// exponentials once): the recorded walk runs for all the points together
    /// ([`Schedule::run_lanes`], with `room` for its factors), the concentrations bit for bit
    /// [`Problem::cost`]'s.
    ///
    /// The values are [`Problem::cost`]'s to rounding, not bit for bit, and come as a
    /// [`SplitCost`]: the quantified levels' ln(2π σᵢ²) are taken as the logarithm of their
    /// product, left to the caller (the product's roundings move the sum by about one unit in
    /// the last place a level, as the separate logarithms' do). A product that leaves the
    /// normal range of f64 (dozens of levels with tiny variances) sends the point to
    /// [`Problem::cost`]'s sum.
    pub(crate) fn costs_and_parameters<const LANES: usize>(
        &self,
        theta: &[[f64; MAX]; LANES],
        room: &mut LaneFactors<LANES>,
    ) -> [(SplitCost, [f64; MAX]); LANES] {
        let parameters: [[f64; MAX]; LANES] = std::array::from_fn(|i| self.parameters(&theta[i][..self.n]));
        let kinetics = parameters.map(|p| self.kinetics(p));
        let mut totals = [0.0; LANES];
        let mut spreads = [1.0; LANES];
        let mut levels = self.levels.iter();
        self.schedule.run_lanes(&kinetics, room, |fi| {
            let Some(level) = levels.next() else { return };
            for ((total, spread), f) in totals.iter_mut().zip(&mut spreads).zip(fi) {
                match (&self.likelihood, level.conc_mg_l) {
                    (Likelihood::Bayes(res), Some(y)) => {
                        let var = variance(res, f);
                        if var > 0.0 {
                            let (two_pi_var, squared) = quantified_parts(y, f, var);
                            *spread *= two_pi_var;
                            *total += squared;
                        } else {
                            *total += level_term(level, f, var);
                        }
                    }
                    _ => *total += self.level_cost(level, f),
                }
            }
        });
        std::array::from_fn(|i| {
            let theta = &theta[i][..self.n];
            let cost = if spreads[i].is_normal() {
                SplitCost { sum: self.with_prior(totals[i], theta), spread: spreads[i] }
            } else {
                SplitCost { sum: self.value_with(theta, parameters[i]), spread: 1.0 }
            };
            (cost, parameters[i])
        })
    }

    /// Objective value and exact gradient.
    pub fn cost_and_gradient(&self, theta: &[f64]) -> (f64, [f64; MAX]) {
        // Carry only as many derivatives as there are parameters: a third of the work less for
        // intravenous fits.
        if self.n == 2 {
            let duals: [Dual<2>; 2] = std::array::from_fn(|i| Dual::var(theta[i], i));
            let v = self.value(&duals);
            (v.v, [v.d[0], v.d[1], 0.0])
        } else {
            let duals: [D3; MAX] = std::array::from_fn(|i| D3::var(theta[i], i));
            let v = self.value(&duals);
            (v.v, v.d)
        }
    }

    /// The Gauss–Newton approximation of the Hessian, 2·Σ wᵢ ∇fᵢ ∇fᵢᵀ + 2·Ω⁻¹ with wᵢ = 1/σᵢ² (or
    /// the least-squares weight): one pass of the engine, good enough to start a quasi-Newton
    /// solver from (below-limit levels and the σ(f) dependence are left out).
    pub(crate) fn gauss_newton(&self, theta: &[f64]) -> Mat {
        let duals: Vec<D3> = (0..self.n).map(|i| D3::var(theta[i], i)).collect();
        let f = self.predictions(&duals);
        let mut m = [[0.0; MAX]; MAX];
        for (level, fi) in self.levels.iter().zip(&f) {
            let w = match (&self.likelihood, level.conc_mg_l) {
                (_, None) => continue,
                (Likelihood::Bayes(res), Some(_)) => 1.0 / res.variance(fi.v),
                (Likelihood::LeastSquares(wt), Some(y)) => weight(*wt, y),
            };
            for i in 0..self.n {
                for j in 0..self.n {
                    m[i][j] += 2.0 * w * fi.d[i] * fi.d[j];
                }
            }
        }
        if let Some(prior) = &self.prior {
            for i in 0..self.n {
                for j in 0..self.n {
                    m[i][j] += 2.0 * prior.precision[i][j];
                }
            }
        }
        m
    }

    /// Hessian by central differences of the exact gradient (step 1e-4 in log-parameters).
    pub(crate) fn hessian(&self, theta: &[f64]) -> Mat {
        let h = 1e-4;
        let mut m = [[0.0; MAX]; MAX];
        for j in 0..self.n {
            let mut up = [0.0; MAX];
            up[..self.n].copy_from_slice(&theta[..self.n]);
            let mut down = up;
            up[j] += h;
            down[j] -= h;
            let (_, gu) = self.cost_and_gradient(&up[..self.n]);
            let (_, gd) = self.cost_and_gradient(&down[..self.n]);
            for i in 0..self.n {
                m[i][j] = (gu[i] - gd[i]) / (2.0 * h);
            }
        }
        for i in 0..self.n {
            for j in 0..i {
                let s = 0.5 * (m[i][j] + m[j][i]);
                m[i][j] = s;
                m[j][i] = s;
            }
        }
        m
    }
}

/// An objective value as `sum` + ln `spread` (`spread` a positive normal number), the form in
/// which [`Problem::costs_and_parameters`] leaves it: a caller that adds a logarithm of its
/// own takes both with one ([`SplitCost::less_ln_power`]).
#[derive(Debug, Clone, Copy)]
pub(crate) struct SplitCost {
    pub sum: f64,
    pub spread: f64,
}

impl SplitCost {
    /// The objective value.
    pub fn value(self) -> f64 {
        self.sum + self.spread.ln()
    }

    /// The value less `power`·ln `base` (`base` ≥ 1), with one logarithm where
    /// `spread`/`base`^`power` is a normal number, else with two.
    pub fn less_ln_power(self, base: f64, power: i32) -> f64 {
        let spread = self.spread / base.powi(power);
        if spread.is_normal() { self.sum + spread.ln() } else { self.value() - f64::from(power) * base.ln() }
    }
}

/// The residual variance σ² = a² + b²·f² at prediction `f`.
#[inline(always)]
fn variance<R: Real>(res: &Residual, f: R) -> R {
    R::cst(res.additive_mg_l.powi(2)) + f * f * res.proportional_cv.powi(2)
}

/// The least-squares weight of a level with value `y`.
pub(crate) fn weight(w: Weighting, y: f64) -> f64 {
    match w {
        Weighting::None => 1.0,
        Weighting::InvY => 1.0 / y,
        Weighting::InvY2 => 1.0 / (y * y),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The objective at eight points together against each point alone, on a subject with an
    /// estimated ka, oral and infused doses, a level below the limit, under MAP and WLS: the
    /// same parameters, the same cost to rounding (the quantified levels' logarithms are taken
    /// of their product), bit for bit under WLS, which has none.
    #[test]
    fn points_evaluated_together_give_each_points_cost() {
        use crate::dosing::Route;
        let dose = |time_h, route, duration_h| Dose { time_h, amount_mg: 500.0, route, duration_h };
        let doses =
            [dose(0.0, Route::Oral, 0.0), dose(12.0, Route::Infusion, 1.5), dose(24.0, Route::Oral, 0.0)];
        let level = |time_h, conc_mg_l, lloq_mg_l| Level { time_h, conc_mg_l, lloq_mg_l, line: 0 };
        let levels =
            [level(2.0, Some(6.1), Some(0.5)), level(13.0, Some(9.4), None), level(60.0, None, Some(0.5))];
        let fixed = Fixed { n: 3, ka_per_h: None, f: 0.8, tlag_h: 0.4 };
        let prior = Prior {
            mean: [1.4, 3.9, 0.1],
            precision: [[11.0, -3.0, 0.0], [-3.0, 16.0, 0.0], [0.0, 0.0, 4.0]],
        };
        let residual = Residual { additive_mg_l: 0.2, proportional_cv: 0.15 };
        let theta: [[f64; MAX]; 8] = std::array::from_fn(|i| {
            let x = i as f64;
            [1.0 + 0.15 * x, 3.5 + 0.1 * x, -1.5 + 0.45 * x]
        });
        for (likelihood, prior) in
            [(Likelihood::Bayes(residual), Some(prior)), (Likelihood::LeastSquares(Weighting::InvY2), None)]
        {
            let problem = Problem::new(&doses, &levels, fixed, likelihood, prior);
            let mut room = LaneFactors::default();
            let exact = matches!(problem.likelihood, Likelihood::LeastSquares(_));
            for (t, (cost, parameters)) in theta.iter().zip(problem.costs_and_parameters(&theta, &mut room)) {
                let (cost, alone) = (cost.value(), problem.cost(t));
                if exact {
                    assert_eq!(cost.to_bits(), alone.to_bits(), "θ {t:?}");
                } else {
                    assert!((cost - alone).abs() <= 1e-14 * (1.0 + alone.abs()), "θ {t:?}: {cost} {alone}");
                }
                assert_eq!(parameters.map(f64::to_bits), t.map(|x| x.exp().to_bits()), "θ {t:?}");
            }
        }
    }

    /// Where the product of the levels' 2π σ² leaves the normal range (here 40 levels with
    /// σ² near 10⁻¹²: a product near 10⁻⁴⁴⁰), each point's cost is [`Problem::cost`]'s own sum.
    #[test]
    fn a_product_out_of_range_falls_back_to_the_sum() {
        use crate::dosing::Route;
        let doses = [Dose { time_h: 0.0, amount_mg: 1e-5, route: Route::Bolus, duration_h: 0.0 }];
        let levels: Vec<Level> = (1..=40)
            .map(|i| Level { time_h: f64::from(i), conc_mg_l: Some(1e-7), lloq_mg_l: None, line: 0 })
            .collect();
        let fixed = Fixed { n: 2, ka_per_h: None, f: 1.0, tlag_h: 0.0 };
        let residual = Residual { additive_mg_l: 1e-6, proportional_cv: 0.0 };
        let problem = Problem::new(&doses, &levels, fixed, Likelihood::Bayes(residual), None);
        let theta: [[f64; MAX]; 8] = std::array::from_fn(|i| [-1.0 + 0.1 * i as f64, 3.0, 0.0]);
        let mut room = LaneFactors::default();
        for (t, (cost, _)) in theta.iter().zip(problem.costs_and_parameters(&theta, &mut room)) {
            let cost = cost.value();
            assert!(cost.is_finite());
            assert_eq!(cost.to_bits(), problem.cost(t).to_bits(), "θ {t:?}");
        }
    }

    /// The objective less a power's logarithm, with one logarithm (to rounding) and, where the
    /// power leaves the range of f64, with two (exactly so).
    #[test]
    fn a_split_cost_less_a_powers_logarithm() {
        let cost = SplitCost { sum: 12.5, spread: 3.7e-4 };
        for (base, power) in [(1.0, 7), (1.3, 8), (57.0, 7), (1e4, 8)] {
            let want = cost.value() - f64::from(power) * f64::ln(base);
            let got = cost.less_ln_power(base, power);
            assert!((got - want).abs() <= 1e-14 * (1.0 + want.abs()), "{base}^{power}: {got} {want}");
        }
        // 1e300^8 overflows (the two-logarithm path); 1^8 = 1 leaves the value itself.
        assert_eq!(cost.less_ln_power(1e300, 8).to_bits(), (cost.value() - 8.0 * 1e300f64.ln()).to_bits());
        assert_eq!(cost.less_ln_power(1.0, 8).to_bits(), cost.value().to_bits());
    }

    #[test]
    fn the_lower_tail_is_continuous_at_the_switch() {
        let (a, b) = (ln_norm_cdf(-30.0 + 1e-9), ln_norm_cdf(-30.0 - 1e-9));
        assert!((a - b).abs() / a.abs() < 1e-9, "{a} {b}");
        let (a, b) = (ln_norm_cdf_slope(-30.0 + 1e-9), ln_norm_cdf_slope(-30.0 - 1e-9));
        assert!((a - b).abs() / a < 1e-6, "{a} {b}");
    }
}
