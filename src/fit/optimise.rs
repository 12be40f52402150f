//! Minimising an objective: BFGS with a line search satisfying the strong Wolfe conditions on
//! the exact gradient, Nelder–Mead when BFGS fails, then a few safeguarded Newton steps on the
//! central-difference Hessian so the optimum is tight (the reference comparisons ask for 1e-5
//! relative).
//!
//! BFGS and its line search follow Nocedal J, Wright SJ. Numerical Optimization, 2nd ed.,
//! Springer 2006: the inverse-Hessian update (their eq. 6.17), the line search of their
//! algorithm 3.5 with the `zoom` of algorithm 3.6, the trial step in `zoom` the minimiser of the
//! cubic through both ends' values and slopes (their eq. 3.59; recalled, not checked against a
//! bibliographic record). Nelder–Mead (Nelder JA, Mead R. Comput J 1965;7:308–313) with the usual
//! coefficients: reflection 1, expansion 2, contraction ½, shrink ½. The problems have two or
//! three parameters, so every point and matrix is a fixed-size array: an iteration allocates
//! nothing.

use super::linalg::{MAX, Mat, cholesky, cholesky_solve, spd_inverse};
use super::objective::Problem;
use crate::limits::MAX_EVALUATIONS;
use std::cell::Cell;
use std::fmt;

/// A point in the (at most three) log-parameters; entries from `n` on are 0.
type Point = [f64; MAX];

/// How a minimisation ended.
#[derive(Debug, Clone)]
pub struct Optimum {
    /// Best θ found.
    pub theta: Vec<f64>,
    /// Objective there.
    pub cost: f64,
    /// Hessian of the objective there.
    pub hessian: Mat,
    /// Largest |gradient component| at the optimum.
    pub gradient_norm: f64,
    /// Gradient small and Hessian positive definite.
    pub converged: bool,
    /// Solver iterations used (BFGS or Nelder–Mead, plus Newton steps).
    pub iterations: u64,
    /// What the solver reported.
    pub reason: String,
}

/// The gradient size (objective units per unit of log-parameter) taken as converged.
const GRADIENT_TOLERANCE: f64 = 1e-5;

/// BFGS stops when the gradient's Euclidean norm is below this (the Newton polish then takes
/// it far lower), or when an iteration changes the objective by less than [`BFGS_COST_CHANGE`].
const BFGS_GRADIENT: f64 = 1e-6;
const BFGS_COST_CHANGE: f64 = 1e-15;
const BFGS_ITERATIONS: u64 = 200;

/// The strong Wolfe conditions' constants: sufficient decrease c₁ and curvature c₂ (Nocedal &
/// Wright's values for quasi-Newton methods).
const C1: f64 = 1e-4;
const C2: f64 = 0.9;
/// The most trial steps of one line search in each of its two phases.
const LINE_SEARCH_TRIALS: usize = 40;

const NELDER_MEAD_ITERATIONS: u64 = 2000;
/// Nelder–Mead stops when the sample standard deviation of the simplex's objective values is
/// below this.
const NELDER_MEAD_SPREAD: f64 = 1e-12;

/// The shared budget of evaluations was spent: the solver running ends.
#[derive(Debug)]
struct BudgetSpent;

impl fmt::Display for BudgetSpent {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "stopped after {MAX_EVALUATIONS} evaluations of the objective")
    }
}

/// The problem with a budget of evaluations shared by every solver run on it, so that no input
/// makes a line search or a simplex search forever (on a non-finite or flat objective); once
/// the budget is spent every evaluation is an error, which ends whatever solver is running.
/// A non-finite objective (or gradient) is +∞: the solvers back away from it.
struct Counted<'a> {
    problem: &'a Problem,
    spent: &'a Cell<u64>,
}

impl Counted<'_> {
    fn spend(&self) -> Result<(), BudgetSpent> {
        self.spent.set(self.spent.get() + 1);
        if self.spent.get() > MAX_EVALUATIONS {
            return Err(BudgetSpent);
        }
        Ok(())
    }

    fn cost(&self, x: &Point) -> Result<f64, BudgetSpent> {
        self.spend()?;
        let c = self.problem.cost(&x[..self.problem.n]);
        Ok(if c.is_finite() { c } else { f64::INFINITY })
    }

    fn cost_and_gradient(&self, x: &Point) -> Result<(f64, Point), BudgetSpent> {
        self.spend()?;
        let (c, g) = self.problem.cost_and_gradient(&x[..self.problem.n]);
        Ok(if c.is_finite() && g.iter().all(|v| v.is_finite()) {
            (c, g)
        } else {
            (f64::INFINITY, [0.0; MAX])
        })
    }
}

fn point(x: &[f64]) -> Point {
    let mut p = [0.0; MAX];
    p[..x.len()].copy_from_slice(x);
    p
}

fn dot(a: &Point, b: &Point) -> f64 {
    (0..MAX).map(|i| a[i] * b[i]).sum()
}

/// a + s·b.
fn axpy(a: &Point, s: f64, b: &Point) -> Point {
    std::array::from_fn(|i| a[i] + s * b[i])
}

fn identity(n: usize) -> Mat {
    let mut m = [[0.0; MAX]; MAX];
    (0..n).for_each(|i| m[i][i] = 1.0);
    m
}

fn times(m: &Mat, x: &Point) -> Point {
    std::array::from_fn(|i| dot(&m[i], x))
}

/// A point on the search line: the step α, the point, its objective and gradient, and the
/// objective's slope along the line there.
#[derive(Clone, Copy)]
struct Trial {
    alpha: f64,
    x: Point,
    cost: f64,
    gradient: Point,
    slope: f64,
}

/// A step along the descent direction `d` from `start` satisfying the strong Wolfe conditions
/// (Nocedal & Wright algorithm 3.5: trial steps 1, 2, 4, … until an interval holding such a
/// step is bracketed, then [`zoom`]). `None` when no trial lowered the objective enough.
fn line_search(f: &Counted, start: &Trial, d: &Point) -> Result<Option<Trial>, BudgetSpent> {
    let at = |alpha: f64| -> Result<Trial, BudgetSpent> {
        let x = axpy(&start.x, alpha, d);
        let (cost, gradient) = f.cost_and_gradient(&x)?;
        Ok(Trial { alpha, x, cost, gradient, slope: dot(&gradient, d) })
    };
    let mut previous = *start;
    let mut alpha = 1.0;
    for _ in 0..LINE_SEARCH_TRIALS {
        let t = at(alpha)?;
        if !sufficient_decrease(start, &t) || (previous.alpha > 0.0 && t.cost >= previous.cost) {
            return zoom(start, previous, t, &at);
        }
        if t.slope.abs() <= -C2 * start.slope {
            return Ok(Some(t));
        }
        if t.slope >= 0.0 {
            return zoom(start, t, previous, &at);
        }
        previous = t;
        alpha *= 2.0;
    }
    // Still descending after the longest trial: take it (it lowered the objective enough).
    Ok((previous.alpha > 0.0).then_some(previous))
}

/// Armijo's condition: φ(α) ≤ φ(0) + c₁·α·φ′(0) (false where the objective is not finite).
fn sufficient_decrease(start: &Trial, t: &Trial) -> bool {
    t.cost <= start.cost + C1 * t.alpha * start.slope
}

/// Nocedal & Wright algorithm 3.6: `lo` is the lowest point so far satisfying sufficient
/// decrease, and a step satisfying the strong Wolfe conditions lies between `lo` and `hi`.
/// Ends with the lowest point found (if it is not the start) when the trials run out.
fn zoom(
    start: &Trial,
    mut lo: Trial,
    mut hi: Trial,
    at: &impl Fn(f64) -> Result<Trial, BudgetSpent>,
) -> Result<Option<Trial>, BudgetSpent> {
    for _ in 0..LINE_SEARCH_TRIALS {
        if (hi.alpha - lo.alpha).abs() <= 1e-14 * lo.alpha.max(hi.alpha) {
            break;
        }
        let t = at(interpolate(&lo, &hi))?;
        if !sufficient_decrease(start, &t) || t.cost >= lo.cost {
            hi = t;
        } else {
            if t.slope.abs() <= -C2 * start.slope {
                return Ok(Some(t));
            }
            if t.slope * (hi.alpha - lo.alpha) >= 0.0 {
                hi = lo;
            }
            lo = t;
        }
    }
    Ok((lo.alpha > 0.0).then_some(lo))
}

/// The minimiser of the cubic through both ends' values and slopes (Nocedal & Wright eq.
/// 3.59), kept a tenth of the interval away from either end; the midpoint where the cubic has
/// no such minimiser or an end's objective is not finite.
fn interpolate(lo: &Trial, hi: &Trial) -> f64 {
    let (a0, a1) = (lo.alpha, hi.alpha);
    let d1 = lo.slope + hi.slope - 3.0 * (lo.cost - hi.cost) / (a0 - a1);
    let d2 = (a1 - a0).signum() * (d1 * d1 - lo.slope * hi.slope).sqrt();
    let a = a1 - (a1 - a0) * (hi.slope + d2 - d1) / (hi.slope - lo.slope + 2.0 * d2);
    let (low, high) = (a0.min(a1), a0.max(a1));
    let margin = 0.1 * (high - low);
    if a.is_finite() && a >= low + margin && a <= high - margin { a } else { 0.5 * (a0 + a1) }
}

/// BFGS from `start`: the best point, the iterations and why it stopped.
fn bfgs(problem: &Problem, start: &[f64], spent: &Cell<u64>) -> Result<(Point, u64, String), BudgetSpent> {
    let n = problem.n;
    let f = Counted { problem, spent };
    let x = point(start);
    let (cost, gradient) = f.cost_and_gradient(&x)?;
    let mut here = Trial { alpha: 0.0, x, cost, gradient, slope: 0.0 };
    if !cost.is_finite() {
        return Ok((x, 0, "the objective is not finite at the start".into()));
    }
    // Start from the inverse Gauss–Newton curvature at the start when it is positive definite
    // (few iterations then), else from the identity.
    let mut inverse = spd_inverse(&problem.gauss_newton(start), n).unwrap_or_else(|| identity(n));
    for iteration in 0..BFGS_ITERATIONS {
        if dot(&here.gradient, &here.gradient).sqrt() < BFGS_GRADIENT {
            return Ok((here.x, iteration, "Solver converged".into()));
        }
        let mut d = times(&inverse, &here.gradient).map(|v| -v);
        here.slope = dot(&here.gradient, &d);
        if here.slope.is_nan() || here.slope >= 0.0 {
            // Rounding has cost the inverse its positive definiteness (or its finiteness): start
            // again from the steepest descent.
            inverse = identity(n);
            d = here.gradient.map(|v| -v);
            here.slope = dot(&here.gradient, &d);
        }
        let Some(next) = line_search(&f, &here, &d)? else {
            return Ok((here.x, iteration, "the line search found no lower point".into()));
        };
        let s: Point = std::array::from_fn(|i| next.x[i] - here.x[i]);
        let y: Point = std::array::from_fn(|i| next.gradient[i] - here.gradient[i]);
        let sy = dot(&s, &y);
        // The strong Wolfe conditions make sᵀy positive; skip the update where rounding did not.
        if sy > 0.0 {
            // H ← (I − ρsyᵀ) H (I − ρysᵀ) + ρssᵀ, ρ = 1/sᵀy, written out for a symmetric H.
            let rho = 1.0 / sy;
            let hy = times(&inverse, &y);
            let yhy = dot(&y, &hy);
            for i in 0..n {
                for j in 0..n {
                    inverse[i][j] +=
                        -rho * (s[i] * hy[j] + hy[i] * s[j]) + (rho * rho * yhy + rho) * s[i] * s[j];
                }
            }
        }
        let change = (here.cost - next.cost).abs();
        here = Trial { alpha: 0.0, ..next };
        if change < BFGS_COST_CHANGE {
            return Ok((here.x, iteration + 1, "Solver converged".into()));
        }
    }
    Ok((here.x, BFGS_ITERATIONS, "Maximum number of iterations reached".into()))
}

/// Nelder–Mead from the simplex of `start` and `start` moved by 0.3 along each log-parameter.
fn nelder_mead(
    problem: &Problem,
    start: &[f64],
    spent: &Cell<u64>,
) -> Result<(Point, u64, String), BudgetSpent> {
    let n = problem.n;
    let f = Counted { problem, spent };
    let mut simplex = [([0.0; MAX], 0.0); MAX + 1];
    for (i, vertex) in simplex.iter_mut().take(n + 1).enumerate() {
        let mut x = point(start);
        if i > 0 {
            x[i - 1] += 0.3;
        }
        *vertex = (x, f.cost(&x)?);
    }
    let simplex = &mut simplex[..=n];
    let order =
        |s: &mut [(Point, f64)]| s.sort_by(|a, b| a.1.partial_cmp(&b.1).unwrap_or(std::cmp::Ordering::Equal));
    order(simplex);
    for iteration in 0..NELDER_MEAD_ITERATIONS {
        let mean = simplex.iter().map(|v| v.1).sum::<f64>() / (n + 1) as f64;
        let spread = (simplex.iter().map(|v| (v.1 - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
        if spread < NELDER_MEAD_SPREAD {
            return Ok((simplex[0].0, iteration, "Nelder-Mead: Solver converged".into()));
        }
        let (best, second_worst, worst) = (simplex[0], simplex[n - 1], simplex[n]);
        let mut centroid = [0.0; MAX];
        for v in &simplex[..n] {
            centroid = axpy(&centroid, 1.0 / n as f64, &v.0);
        }
        // centroid + s·(x − centroid)
        let toward = |x: &Point, s: f64| std::array::from_fn(|i| centroid[i] + s * (x[i] - centroid[i]));
        let reflected: Point = toward(&worst.0, -1.0);
        let reflected_cost = f.cost(&reflected)?;
        if reflected_cost < best.1 {
            let expanded = toward(&reflected, 2.0);
            let expanded_cost = f.cost(&expanded)?;
            simplex[n] = if expanded_cost < reflected_cost {
                (expanded, expanded_cost)
            } else {
                (reflected, reflected_cost)
            };
        } else if reflected_cost < second_worst.1 {
            simplex[n] = (reflected, reflected_cost);
        } else {
            // Contract: outside (toward the reflected point) when that beat the worst vertex,
            // else inside; when the contraction does not improve, shrink every vertex halfway
            // toward the best.
            let outside = reflected_cost < worst.1;
            let x = if outside { toward(&reflected, 0.5) } else { toward(&worst.0, 0.5) };
            let c = f.cost(&x)?;
            if (outside && c <= reflected_cost) || (!outside && c < worst.1) {
                simplex[n] = (x, c);
            } else {
                for v in simplex.iter_mut().skip(1) {
                    v.0 = std::array::from_fn(|i| best.0[i] + 0.5 * (v.0[i] - best.0[i]));
                    v.1 = f.cost(&v.0)?;
                }
            }
        }
        order(simplex);
    }
    Ok((simplex[0].0, NELDER_MEAD_ITERATIONS, "Nelder-Mead: Maximum number of iterations reached".into()))
}

fn max_abs(g: &[f64]) -> f64 {
    g.iter().fold(0.0, |m, x| m.max(x.abs()))
}

/// Minimise from `start`, within [`MAX_EVALUATIONS`] evaluations of the objective (the
/// Newton polish after the solvers is itself bounded: 4 steps of at most 20 halvings).
pub fn minimise(problem: &Problem, start: &[f64]) -> Optimum {
    let n = problem.n;
    let spent = Cell::new(0);
    let (mut theta, mut iterations, mut reason) = match bfgs(problem, start, &spent) {
        Ok(r) if problem.cost(&r.0[..n]).is_finite() => r,
        _ => nelder_mead(problem, start, &spent)
            .unwrap_or_else(|e| (point(start), 0, format!("solver error: {e}"))),
    };
    let (mut cost, mut gradient) = problem.cost_and_gradient(&theta[..n]);
    let mut hessian = problem.hessian(&theta[..n]);
    if max_abs(&gradient[..n]) > 1e-2 || cholesky(&hessian, n).is_none() {
        // BFGS stopped far from a stationary point, or where the curvature is not a minimum's
        // (a small gradient on a flat slope: a least-squares objective weighted by 1/y² can be
        // tiny everywhere): try the derivative-free solver from there.
        if let Ok((t, i, r)) = nelder_mead(problem, &theta[..n], &spent)
            && problem.cost(&t[..n]) <= cost
        {
            theta = t;
            iterations += i;
            reason = r;
            (cost, gradient) = problem.cost_and_gradient(&theta[..n]);
            hessian = problem.hessian(&theta[..n]);
        }
    }
    // Safeguarded Newton polish with the Hessian at the solver's optimum (near the optimum the
    // curvature hardly changes, so one Hessian serves every step and the Laplace covariance).
    if let Some(l) = cholesky(&hessian, n) {
        let mut moved = false;
        for _ in 0..4 {
            if max_abs(&gradient[..n]) < 1e-10 {
                break;
            }
            let step = cholesky_solve(&l, n, &gradient[..n]);
            // Where the decrease the full step promises, ½gᵀH⁻¹g, is below the objective's
            // rounding, comparing objectives cannot tell a better point from a worse one (nor
            // can any shorter step): the full step is taken when it shrinks the gradient and
            // raises the objective by no more than its rounding.
            let rounding = 1e-13 * cost.abs().max(1.0);
            let (trial, c, g) = if 0.5 * dot(&gradient, &step) < rounding {
                let trial = axpy(&theta, -1.0, &step);
                let (c, g) = problem.cost_and_gradient(&trial[..n]);
                if !(c <= cost + rounding && max_abs(&g[..n]) < max_abs(&gradient[..n])) {
                    break;
                }
                (trial, c, g)
            } else {
                let Some((trial, c)) = (0..20).map(|h| 0.5f64.powi(h)).find_map(|scale| {
                    let trial = axpy(&theta, -scale, &step);
                    let c = problem.cost(&trial[..n]);
                    (c <= cost).then_some((trial, c))
                }) else {
                    break;
                };
                (trial, c, problem.cost_and_gradient(&trial[..n]).1)
            };
            moved |= (0..n).any(|i| (trial[i] - theta[i]).abs() > 1e-6);
            theta = trial;
            cost = c;
            gradient = g;
            iterations += 1;
        }
        if moved {
            hessian = problem.hessian(&theta[..n]);
        }
    }
    let gradient_norm = max_abs(&gradient[..n]);
    let positive = cholesky(&hessian, n).is_some();
    Optimum {
        converged: gradient_norm < GRADIENT_TOLERANCE && positive && cost.is_finite(),
        theta: theta[..n].to_vec(),
        cost,
        hessian,
        gradient_norm,
        iterations,
        reason,
    }
}

/// What the other starts found besides the best optimum.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Others {
    /// Nothing else: every converged start reached the same point.
    None,
    /// A worse local optimum elsewhere.
    WorseOptimum,
    /// Another parameter set that fits equally well: the data do not decide between them.
    EqualOptimum,
}

/// Minimise from each of `starts` and keep the best; the `fallback` starts are tried too when
/// none of `starts` converges. Also says what the other starts found elsewhere (a sign of a
/// multimodal objective).
pub fn minimise_from(problem: &Problem, starts: &[[f64; MAX]], fallback: &[[f64; MAX]]) -> (Optimum, Others) {
    let n = problem.n;
    let mut results: Vec<Optimum> = starts.iter().map(|s| minimise(problem, &s[..n])).collect();
    if !results.iter().any(|r| r.converged) {
        results.extend(fallback.iter().map(|s| minimise(problem, &s[..n])));
    }
    results.sort_by(|a, b| {
        (!a.converged, a.cost).partial_cmp(&(!b.converged, b.cost)).unwrap_or(std::cmp::Ordering::Equal)
    });
    let best = results.remove(0);
    let elsewhere = |r: &&Optimum| r.converged && (0..n).any(|i| (r.theta[i] - best.theta[i]).abs() > 1e-3);
    let equal = |r: &Optimum| r.cost - best.cost <= 1e-6 * best.cost.abs().max(1.0);
    let others = match results.iter().filter(elsewhere).map(equal).reduce(|a, b| a || b) {
        None => Others::None,
        Some(true) => Others::EqualOptimum,
        Some(false) => Others::WorseOptimum,
    };
    (best, others)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dosing::{Dose, Route};
    use crate::fit::objective::{Fixed, Likelihood, Weighting};
    use crate::io::levels::Level;

    #[test]
    fn nelder_mead_with_the_budget_spent_ends_with_an_error_not_a_panic() {
        // Once the shared budget of evaluations is spent, Nelder–Mead ends with an error at its
        // first simplex, not a panic.
        let doses = [Dose { time_h: 0.0, amount_mg: 1000.0, route: Route::Bolus, duration_h: 0.0 }];
        let levels = [Level { time_h: 2.0, conc_mg_l: Some(10.0), lloq_mg_l: None, line: 0 }];
        let fixed = Fixed { n: 2, ka_per_h: None, f: 1.0, tlag_h: 0.0 };
        let problem = Problem::new(&doses, &levels, fixed, Likelihood::LeastSquares(Weighting::None), None);
        let spent = Cell::new(MAX_EVALUATIONS - 1);
        let error = nelder_mead(&problem, &[1.0, 3.0], &spent).expect_err("the budget is spent");
        assert!(error.to_string().contains("evaluations of the objective"), "{error}");
        // With budget left it runs.
        assert!(nelder_mead(&problem, &[1.0, 3.0], &Cell::new(0)).is_ok());
    }

    /// An intravenous subject with three levels and the least-squares objective.
    fn three_levels() -> Problem {
        let doses = [Dose { time_h: 0.0, amount_mg: 1000.0, route: Route::Bolus, duration_h: 0.0 }];
        let levels: Vec<Level> = [(1.0, 18.0), (4.0, 12.5), (10.0, 5.9)]
            .iter()
            .map(|&(time_h, c)| Level { time_h, conc_mg_l: Some(c), lloq_mg_l: None, line: 0 })
            .collect();
        let fixed = Fixed { n: 2, ka_per_h: None, f: 1.0, tlag_h: 0.0 };
        Problem::new(&doses, &levels, fixed, Likelihood::LeastSquares(Weighting::None), None)
    }

    #[test]
    fn the_line_search_step_satisfies_the_strong_wolfe_conditions() {
        // Steepest descent from far away: step 1 is far too long (the objective overflows or
        // rises), so the search must bracket and zoom. The conditions are checked on an
        // evaluation of its own.
        let problem = three_levels();
        let x = [0.5, 4.5, 0.0];
        let (cost, gradient) = problem.cost_and_gradient(&x[..2]);
        let d = gradient.map(|g| -g);
        let start = Trial { alpha: 0.0, x, cost, gradient, slope: dot(&gradient, &d) };
        let f = Counted { problem: &problem, spent: &Cell::new(0) };
        let t = line_search(&f, &start, &d).unwrap().expect("a step");
        let (c, g) = problem.cost_and_gradient(&axpy(&x, t.alpha, &d)[..2]);
        assert!(c <= cost + C1 * t.alpha * start.slope, "sufficient decrease: {c} from {cost}");
        assert!(dot(&g, &d).abs() <= -C2 * start.slope, "curvature: {} against {}", dot(&g, &d), start.slope);
        assert!(t.alpha < 1.0, "the first trial step was not too long: {}", t.alpha);
    }

    #[test]
    fn bfgs_and_nelder_mead_reach_the_same_optimum() {
        // Two independent solvers (one on the gradient, one on values alone) agree, and the
        // gradient vanishes there.
        let problem = three_levels();
        let (a, _, reason) = bfgs(&problem, &[0.5, 4.5], &Cell::new(0)).unwrap();
        assert_eq!(reason, "Solver converged");
        let (b, _, _) = nelder_mead(&problem, &[0.5, 4.5], &Cell::new(0)).unwrap();
        for i in 0..2 {
            assert!((a[i] - b[i]).abs() < 1e-5, "{a:?} {b:?}");
        }
        let (_, g) = problem.cost_and_gradient(&a[..2]);
        assert!(dot(&g, &g).sqrt() < BFGS_GRADIENT, "{g:?}");
    }
}
