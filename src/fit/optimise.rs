//! Minimising an objective: argmin's BFGS (More–Thuente line search) on the exact gradient,
//! Nelder–Mead when BFGS fails, then a few safeguarded Newton steps on the central-difference
//! Hessian so the optimum is tight (the reference comparisons ask for 1e-5 relative).

use super::linalg::{MAX, Mat, cholesky, cholesky_solve, spd_inverse};
use super::objective::Problem;
use crate::limits::MAX_EVALUATIONS;
use argmin::core::{CostFunction, Error as ArgminError, Executor, Gradient, State};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::neldermead::NelderMead;
use argmin::solver::quasinewton::BFGS;
use std::cell::Cell;

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

/// The problem as argmin sees it, with a budget of evaluations shared by every solver run on
/// it. argmin bounds a solver's iterations but not the line search inside BFGS, which can
/// search forever on a non-finite or flat objective; once the budget is spent every
/// evaluation is an error, which ends whatever solver is running.
struct Adapter<'a> {
    problem: &'a Problem,
    spent: &'a Cell<u64>,
}

fn budget_spent() -> ArgminError {
    ArgminError::msg(format!("stopped after {MAX_EVALUATIONS} evaluations of the objective"))
}

impl Adapter<'_> {
    fn spend(&self) -> Result<(), ArgminError> {
        self.spent.set(self.spent.get() + 1);
        if self.spent.get() > MAX_EVALUATIONS {
            return Err(budget_spent());
        }
        Ok(())
    }
}

impl CostFunction for Adapter<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, p: &Vec<f64>) -> Result<f64, ArgminError> {
        self.spend()?;
        let c = self.problem.cost(p);
        Ok(if c.is_finite() { c } else { f64::MAX })
    }
}

impl Gradient for Adapter<'_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, p: &Vec<f64>) -> Result<Vec<f64>, ArgminError> {
        self.spend()?;
        let (c, g) = self.problem.cost_and_gradient(p);
        let g = &g[..self.problem.n];
        // Where the objective is not finite its gradient means nothing: no direction at all.
        Ok(if c.is_finite() && g.iter().all(|x| x.is_finite()) { g.to_vec() } else { vec![0.0; g.len()] })
    }
}

fn bfgs(problem: &Problem, start: &[f64], spent: &Cell<u64>) -> Result<(Vec<f64>, u64, String), ArgminError> {
    let n = problem.n;
    // Start from the inverse Gauss–Newton curvature at the start when it is positive definite
    // (few iterations then), else from the identity.
    let inverse = spd_inverse(&problem.gauss_newton(start), n);
    let initial: Vec<Vec<f64>> = (0..n)
        .map(|i| (0..n).map(|j| inverse.map_or(if i == j { 1.0 } else { 0.0 }, |m| m[i][j])).collect())
        .collect();
    let solver =
        BFGS::new(MoreThuenteLineSearch::new()).with_tolerance_grad(1e-6)?.with_tolerance_cost(1e-15)?;
    let result = Executor::new(Adapter { problem, spent }, solver)
        .configure(|s| s.param(start.to_vec()).inv_hessian(initial).max_iters(200))
        .run()?;
    let state = result.state();
    let best = state.get_best_param().cloned().unwrap_or_else(|| start.to_vec());
    let reason =
        state.get_termination_reason().map_or_else(|| "running".to_string(), |r| r.text().to_string());
    Ok((best, state.get_iter(), reason))
}

fn nelder_mead(
    problem: &Problem,
    start: &[f64],
    spent: &Cell<u64>,
) -> Result<(Vec<f64>, u64, String), ArgminError> {
    // argmin's Nelder–Mead unwraps the costs of its first simplex, so an exhausted budget must
    // not be met there: it would panic instead of ending the solver.
    if spent.get() + problem.n as u64 + 1 > MAX_EVALUATIONS {
        return Err(budget_spent());
    }
    let mut simplex = vec![start.to_vec()];
    for i in 0..problem.n {
        let mut p = start.to_vec();
        p[i] += 0.3;
        simplex.push(p);
    }
    let solver = NelderMead::new(simplex).with_sd_tolerance(1e-12)?;
    let result = Executor::new(Adapter { problem, spent }, solver).configure(|s| s.max_iters(2000)).run()?;
    let state = result.state();
    let best = state.get_best_param().cloned().unwrap_or_else(|| start.to_vec());
    let reason =
        state.get_termination_reason().map_or_else(|| "running".to_string(), |r| r.text().to_string());
    Ok((best, state.get_iter(), format!("Nelder-Mead: {reason}")))
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
        Ok(r) if problem.cost(&r.0).is_finite() => r,
        _ => nelder_mead(problem, start, &spent)
            .unwrap_or_else(|e| (start.to_vec(), 0, format!("solver error: {e}"))),
    };
    let (mut cost, mut gradient) = problem.cost_and_gradient(&theta);
    if max_abs(&gradient[..n]) > 1e-2 {
        // BFGS stopped far from a stationary point: try the derivative-free solver from there.
        if let Ok((t, i, r)) = nelder_mead(problem, &theta, &spent)
            && problem.cost(&t) <= cost
        {
            theta = t;
            iterations += i;
            reason = r;
            (cost, gradient) = problem.cost_and_gradient(&theta);
        }
    }
    // Safeguarded Newton polish with the Hessian at the solver's optimum (near the optimum the
    // curvature hardly changes, so one Hessian serves every step and the Laplace covariance).
    let mut hessian = problem.hessian(&theta);
    if let Some(l) = cholesky(&hessian, n) {
        let mut moved = false;
        for _ in 0..4 {
            if max_abs(&gradient[..n]) < 1e-10 {
                break;
            }
            let step = cholesky_solve(&l, n, &gradient[..n]);
            let Some((trial, c)) = (0..20).map(|h| 0.5f64.powi(h)).find_map(|scale| {
                let trial: Vec<f64> = (0..n).map(|i| theta[i] - scale * step[i]).collect();
                let c = problem.cost(&trial);
                (c <= cost).then_some((trial, c))
            }) else {
                break;
            };
            moved |= (0..n).any(|i| (trial[i] - theta[i]).abs() > 1e-6);
            theta = trial;
            cost = c;
            gradient = problem.cost_and_gradient(&theta).1;
            iterations += 1;
        }
        if moved {
            hessian = problem.hessian(&theta);
        }
    }
    let gradient_norm = max_abs(&gradient[..n]);
    let positive = cholesky(&hessian, n).is_some();
    Optimum {
        converged: gradient_norm < GRADIENT_TOLERANCE && positive && cost.is_finite(),
        theta,
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
        // argmin's Nelder–Mead unwraps the costs of its first simplex; once the shared budget
        // of evaluations is spent, it must not be started at all.
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
}
