//! Population estimation: the population model (typical values, covariate effects,
//! between-subject variability and correlations, residual error) from a whole study, by
//! maximising the marginal likelihood, each subject's integral over its random effects computed
//! by adaptive Gauss–Hermite quadrature (or the Laplace approximation). Levels below the limit
//! enter by M3. docs/methods.md gives the formulas and the algorithm.
//!
//! The estimate is the fixed point of: adapt every subject at φ (its conditional mode and the
//! nodes there); minimise the study's −2 log-likelihood over φ with those nodes held (BFGS on
//! the exact gradient); repeat until φ and the objective stop moving. The objective reported
//! is that of the final adaptation; with nodes held the quadrature is still a quadrature of the
//! same integral, so near the optimum the held and the adaptive objectives agree to the rule's
//! accuracy.

// Index loops read as the matrix formulas they implement.
#![allow(clippy::needless_range_loop)]

mod marginal;
pub mod quadrature;
pub mod space;
pub mod summary;
mod uncertainty;

use crate::choice::choice_enum;
use crate::dosing::Route;
use crate::error::Error;
use crate::fit::SubjectData;
use crate::fit::linalg::MAX;
use crate::limits::MAX_EVALUATIONS;
use crate::model::PopulationModel;
use marginal::{Adapted, Population};
use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;
use serde::Serialize;
use space::{Free, Space};

choice_enum! {
    /// How each subject's marginal likelihood is computed.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
    #[serde(rename_all = "kebab-case")]
    pub enum Method: "method" {
        /// Adaptive Gauss–Hermite quadrature: the exact likelihood to the rule's accuracy.
        Quadrature = "quadrature",
        /// The Laplace approximation (one node, expected curvature): faster, approximate.
        Laplace = "laplace",
    }
}

/// With the nodes chosen automatically, the number of nodes along each principal axis of a
/// subject's posterior climbs this ladder until moving any one axis to its next rung changes
/// the subject's −2 ln Lᵢ by so little that the changes sum to at most [`NODE_TOLERANCE`]; the
/// smaller rules are used. The error of GH rules falls geometrically with their size (on the
/// theophylline data by a factor of 10 to 100 a rung), so each change is nearly the error that
/// the axis's rule leaves.
pub const NODE_LADDER: [usize; 6] = [7, 10, 14, 20, 28, 40];
/// Rounds of choosing the rules at the current estimate and estimating again with them, after
/// the first estimate with the ladder's first rule. A subject's rule only grows, so the rounds
/// end once no rule needs to.
const NODE_ROUNDS: usize = 4;
/// The agreement asked of successive rules, in −2 ln Lᵢ (the sum over the axes).
pub const NODE_TOLERANCE: f64 = 1e-7;

/// Gauss–Hermite nodes along each principal axis of a subject's posterior (the first `n` used).
pub(crate) type Counts = [usize; MAX];

/// The ladder's rung of `count` (the lowest rung at or above it).
fn rung(count: usize) -> usize {
    NODE_LADDER.iter().position(|&n| n >= count).unwrap_or(NODE_LADDER.len() - 1)
}

/// Options of one estimation.
#[derive(Debug, Clone)]
pub struct Options {
    /// The likelihood.
    pub method: Method,
    /// Gauss–Hermite nodes per random effect (quadrature); `None` chooses them per subject.
    pub nodes: Option<usize>,
    /// Only evaluate the objective at the model's values (no estimation).
    pub evaluate: bool,
    /// Bootstrap replicates (0: none).
    pub bootstrap: usize,
    /// Seed of the bootstrap's resampling.
    pub seed: u64,
    /// The most memory the quadrature nodes' predictions may hold between adaptations, shared
    /// equally by the subjects; a subject whose nodes need more has them placed again from the
    /// rule at every evaluation (the same values, more engine runs), so memory stays bounded
    /// however many subjects a study has.
    pub node_memory_bytes: usize,
}

/// [`Options::node_memory_bytes`] by default: 1 GiB.
pub const NODE_MEMORY_BYTES: usize = 1 << 30;

impl Default for Options {
    fn default() -> Self {
        Options {
            method: Method::Quadrature,
            nodes: None,
            evaluate: false,
            bootstrap: 0,
            seed: 1,
            node_memory_bytes: NODE_MEMORY_BYTES,
        }
    }
}

/// How the estimation ended (data, not a message).
#[derive(Debug, Clone, Serialize)]
pub struct Convergence {
    /// Adaptations made (each followed by a minimisation over φ).
    pub adaptations: usize,
    /// BFGS iterations over all minimisations.
    pub iterations: u64,
    /// Largest |∂(−2LL)/∂φ| at the end.
    pub gradient_norm: f64,
    /// Why it stopped.
    pub reason: String,
}

/// The outcome of an estimation (or an evaluation) before its summary.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// The parameter space.
    pub space: Space,
    /// φ at the end.
    pub phi: Vec<f64>,
    /// −2 ln L at φ.
    pub minus2ll: f64,
    /// Each subject's conditional mode θ̂ and prior mean μ at φ.
    pub modes: Vec<([f64; MAX], [f64; MAX])>,
    /// Converged: φ stopped moving, the gradient is small, every mode was found.
    pub converged: bool,
    /// The details.
    pub convergence: Convergence,
}

/// The study and the settings, with every subject's state between adaptations.
struct Run<'a> {
    space: &'a Space,
    subjects: &'a [SubjectData],
    method: Method,
    /// Each subject's rule sizes (quadrature).
    nodes: Vec<Counts>,
    /// Each subject's share of [`Options::node_memory_bytes`].
    hold_bytes: usize,
}

/// Largest −2LL change, and step in φ, between adaptations taken as converged. A change of
/// 1e-4 in −2LL is far below any difference a likelihood-ratio test reads, and above the noise
/// the conditional modes' own tolerance leaves in the objective of a small study.
const OBJECTIVE_TOLERANCE: f64 = 1e-4;
const STEP_TOLERANCE: f64 = 1e-4;
/// A gradient (−2LL per unit of φ) small enough to call the optimum found, in a small study.
const GRADIENT_TOLERANCE: f64 = 1e-3;
/// Studies up to this many subjects use the tolerances as they are.
const TOLERANCE_SUBJECTS: f64 = 100.0;

/// How much the objective and gradient tolerances grow with the study: √(N/100) beyond 100
/// subjects. Both are sums over subjects, each carrying the rounding of its own conditional
/// mode, so their noise grows as √N; and a gradient g displaces the optimum by about H⁻¹g ∝ g/N,
/// which is the same fraction of a standard error (∝ 1/√N) when g grows as √N.
fn tolerance_scale(subjects: usize) -> f64 {
    (subjects as f64 / TOLERANCE_SUBJECTS).max(1.0).sqrt()
}

/// The rise of −2LL between adaptations that marks a step as misled by the held nodes: far above
/// what moving a coarse rule's nodes does to its error (7 nodes leave 3e-3 in −2LL on the
/// theophylline data, and a simulated study of 200 sparse subjects rose by more than 1e-4 at its
/// optimum), far below the rises of thousands an unguarded step was seen to make.
const RISE_TOLERANCE: f64 = 1.0;
/// The shortest fraction of a step between adaptations tried before giving up.
const MIN_STEP_WEIGHT: f64 = 1e-3;

/// Most adaptations before giving up.
const MAX_ADAPTATIONS: usize = 60;

impl<'a> Run<'a> {
    fn new(space: &'a Space, subjects: &'a [SubjectData], options: &Options) -> Run<'a> {
        Run {
            space,
            subjects,
            method: options.method,
            nodes: vec![[options.nodes.unwrap_or(NODE_LADDER[0]); MAX]; subjects.len()],
            hold_bytes: options.node_memory_bytes / subjects.len().max(1),
        }
    }

    /// What a subject's likelihood needs of the population at `values`; `None` when Ω is not
    /// positive definite.
    fn population<'v>(&self, values: &'v space::Values) -> Option<Population<'v>> {
        Population::new(self.space.n, &values.omega, values.residual, self.absorption(&values.model))
    }

    /// Choose each subject's rules at φ (see [`NODE_LADDER`]), climbing from its rules now
    /// (rules only grow, so the smaller rungs need no new look) and its adaptation at φ with
    /// them, `held`; returns whether any rule grew, the largest sum of a subject's changes at its
    /// chosen rules (an estimate of their error), and every subject adapted at φ with its chosen
    /// rules.
    fn choose_nodes(&mut self, phi: &[f64], held: Vec<Adapted>) -> Result<(bool, f64, Vec<Adapted>), String> {
        let values = self.space.values(phi);
        let population = self
            .population(&values)
            .ok_or("the variabilities and correlations do not form a valid covariance")?;
        let n = self.space.n;
        let chosen: Vec<(Counts, f64, Adapted)> = self
            .subjects
            .par_iter()
            .zip(&self.nodes)
            .zip(held)
            .map(|((s, &now), held)| {
                let (mean, _) = self.space.prior_mean(&values, &s.covariates).ok_or_else(|| {
                    format!(
                        "subject {}: the covariate effects give a typical value of zero or less",
                        s.id.as_deref().unwrap_or("(unnamed)")
                    )
                })?;
                let at = |counts: &Counts, warm: Option<&[f64; MAX]>| {
                    let a = marginal::adapt(s, &population, mean, warm, Some(counts), self.hold_bytes);
                    (marginal::terms(s, &a, &population, &mean).value, a)
                };
                let mut counts = now.map(|c| NODE_LADDER[rung(c)]);
                let (mut value, mut adapted) = if counts == now {
                    (marginal::terms(s, &held, &population, &mean).value, held)
                } else {
                    at(&counts, Some(&held.mode))
                };
                loop {
                    // Each axis's change at its next rung (at the top rung, from the rung below,
                    // which overstates the top rule's error).
                    let mut changes = [0.0; MAX];
                    for axis in 0..n {
                        let k = rung(counts[axis]);
                        let mut other = counts;
                        other[axis] = NODE_LADDER[if k + 1 < NODE_LADDER.len() { k + 1 } else { k - 1 }];
                        changes[axis] = (at(&other, Some(&adapted.mode)).0 - value).abs();
                    }
                    let total: f64 = changes.iter().sum();
                    let grow: Vec<usize> = (0..n)
                        .filter(|&axis| {
                            changes[axis] > NODE_TOLERANCE / n as f64 && counts[axis] < quadrature::MAX_NODES
                        })
                        .collect();
                    if total <= NODE_TOLERANCE || total.is_nan() || grow.is_empty() {
                        return Ok((counts, if total.is_finite() { total } else { 0.0 }, adapted));
                    }
                    // One rung up, and one more for each factor of 100 by which the change exceeds
                    // its share of the tolerance (the fastest fall of the error seen a rung).
                    for axis in grow {
                        let excess = changes[axis] / (NODE_TOLERANCE / n as f64);
                        let more = (excess.log10() / 2.0).floor().max(0.0) as usize;
                        counts[axis] =
                            NODE_LADDER[(rung(counts[axis]) + 1 + more).min(NODE_LADDER.len() - 1)];
                    }
                    (value, adapted) = at(&counts, Some(&adapted.mode));
                }
            })
            .collect::<Result<_, String>>()?;
        let mut grew = false;
        let mut difference = 0.0f64;
        let mut adapted = Vec::with_capacity(chosen.len());
        for (now, (counts, d, a)) in self.nodes.iter_mut().zip(chosen) {
            grew |= counts.iter().zip(now.iter()).any(|(c, n)| c > n);
            *now = counts;
            difference = difference.max(d);
            adapted.push(a);
        }
        Ok((grew, difference, adapted))
    }

    /// The fewest and the most nodes along any axis of any subject.
    fn node_range(&self) -> (usize, usize) {
        let axes = self.nodes.iter().flat_map(|c| c[..self.space.n].iter().copied());
        (axes.clone().min().unwrap_or(0), axes.max().unwrap_or(0))
    }

    fn absorption(&self, model: &PopulationModel) -> (Option<f64>, f64, f64) {
        let a = model.absorption.as_ref();
        let fixed_ka = if self.space.n == 3 { None } else { a.map(|a| a.ka.typical) };
        (fixed_ka, a.map_or(1.0, |a| a.f), a.map_or(0.0, |a| a.tlag_h))
    }

    /// Adapt every subject at φ, warm-starting the modes from `previous`.
    fn adapt(&self, phi: &[f64], previous: Option<&[Adapted]>) -> Result<Vec<Adapted>, String> {
        let values = self.space.values(phi);
        let population = self
            .population(&values)
            .ok_or("the variabilities and correlations do not form a valid covariance")?;
        self.subjects
            .par_iter()
            .enumerate()
            .map(|(i, s)| {
                let (mean, _) = self.space.prior_mean(&values, &s.covariates).ok_or_else(|| {
                    format!(
                        "subject {}: the covariate effects give a typical value of zero or less",
                        s.id.as_deref().unwrap_or("(unnamed)")
                    )
                })?;
                let warm = previous.map(|p| &p[i].mode);
                let counts = (self.method == Method::Quadrature).then_some(&self.nodes[i]);
                Ok(marginal::adapt(s, &population, mean, warm, counts, self.hold_bytes))
            })
            .collect()
    }

    /// −2 ln L at φ with the nodes of `adapted`, and its gradient in φ.
    fn objective(&self, phi: &[f64], adapted: &[Adapted]) -> (f64, Vec<f64>) {
        let p = phi.len();
        let infinite = (f64::INFINITY, vec![0.0; p]);
        let values = self.space.values(phi);
        let n = self.space.n;
        let Some(population) = self.population(&values) else {
            return infinite;
        };
        let per_subject: Vec<Option<(marginal::Terms, Vec<[f64; MAX]>)>> = self
            .subjects
            .par_iter()
            .zip(adapted)
            .map(|(s, a)| {
                let (mean, slopes) = self.space.prior_mean(&values, &s.covariates)?;
                Some((marginal::terms(s, a, &population, &mean), slopes))
            })
            .collect();
        // Summed in subject order, so the result does not depend on the thread count.
        let mut value = 0.0;
        let mut gradient = vec![0.0; p];
        let mut d_omega = [[0.0; MAX]; MAX];
        for item in per_subject {
            let Some((t, slopes)) = item else { return infinite };
            value += t.value;
            for k in 0..p {
                gradient[k] += (0..n).map(|i| t.d_mu[i] * slopes[k][i]).sum::<f64>();
                match self.space.free[k] {
                    Free::Additive => gradient[k] += t.d_residual[0],
                    Free::Proportional => gradient[k] += t.d_residual[1],
                    _ => {}
                }
            }
            for i in 0..n {
                for j in 0..n {
                    d_omega[i][j] += t.d_omega[i][j];
                }
            }
        }
        if !value.is_finite() {
            return infinite;
        }
        for k in 0..p {
            if let Some(s) = self.space.omega_slope(k, &values.omega) {
                gradient[k] +=
                    (0..n).map(|i| (0..n).map(|j| d_omega[i][j] * s[i][j]).sum::<f64>()).sum::<f64>();
            }
        }
        (value, gradient)
    }

    /// Minimise −2 ln L over φ with the nodes held: BFGS with a backtracking (Armijo) line
    /// search, each step at most 1 in every entry of φ (a factor e on a typical value), so a
    /// trial point far outside the data's reach is never evaluated; points where the objective
    /// is not finite (Ω not positive definite) are backed away from.
    fn minimise_held(&self, phi: &[f64], adapted: &[Adapted]) -> (Vec<f64>, u64) {
        let p = phi.len();
        let mut x = phi.to_vec();
        let (mut f, mut g) = self.objective(&x, adapted);
        if p == 0 || !f.is_finite() {
            return (x, 0);
        }
        // The inverse Hessian starts as a multiple of the identity whose first step is 0.1 long.
        let largest = g.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let mut inverse = DMatrix::<f64>::identity(p, p) * (0.1 / largest.max(1e-12));
        let mut spent = 0u64;
        for iteration in 0..500u64 {
            if g.iter().all(|v| v.abs() < 1e-7) || spent > MAX_EVALUATIONS {
                return (x, iteration);
            }
            let gv = DVector::from_column_slice(&g);
            let mut direction = -(&inverse * &gv);
            if direction.dot(&gv) >= 0.0 {
                // Not a descent direction (a poor curvature estimate): restart from the gradient.
                inverse = DMatrix::identity(p, p) * (0.1 / largest.max(1e-12));
                direction = -(&inverse * &gv);
            }
            let longest = direction.amax();
            if longest > 1.0 {
                direction /= longest;
            }
            let slope = direction.dot(&gv);
            let mut step = 1.0;
            let found = loop {
                let trial: Vec<f64> = x.iter().zip(direction.iter()).map(|(a, d)| a + step * d).collect();
                let (ft, gt) = self.objective(&trial, adapted);
                spent += 1;
                if ft.is_finite() && ft <= f + 1e-4 * step * slope {
                    break Some((trial, ft, gt));
                }
                step *= 0.5;
                if step < 1e-12 {
                    break None;
                }
            };
            let Some((trial, ft, gt)) = found else { return (x, iteration) };
            let s = DVector::from_iterator(p, trial.iter().zip(&x).map(|(a, b)| a - b));
            let y = DVector::from_iterator(p, gt.iter().zip(&g).map(|(a, b)| a - b));
            let sy = s.dot(&y);
            if sy > 1e-12 * s.norm() * y.norm() {
                // The BFGS update of the inverse Hessian.
                let rho = 1.0 / sy;
                let identity = DMatrix::<f64>::identity(p, p);
                let left = &identity - &s * y.transpose() * rho;
                let right = &identity - &y * s.transpose() * rho;
                inverse = &left * &inverse * &right + &s * s.transpose() * rho;
            }
            let converged = (f - ft).abs() <= 1e-14 * f.abs().max(1.0);
            x = trial;
            f = ft;
            g = gt;
            if converged {
                return (x, iteration + 1);
            }
        }
        (x, 500)
    }

    /// The fixed point from `start` (see the module's text).
    fn estimate(
        &self,
        start: &[f64],
        adapted: Option<Vec<Adapted>>,
        evaluate: bool,
    ) -> Result<Found, String> {
        let mut phi = start.to_vec();
        let mut adapted = match adapted {
            Some(adapted) => adapted,
            None => self.adapt(&phi, None)?,
        };
        let (mut value, _) = self.objective(&phi, &adapted);
        if !value.is_finite() {
            return Err("the objective is not finite at the start model's values: the levels are impossible under it \
                        (check the residual error and the units)"
                .into());
        }
        let mut convergence =
            Convergence { adaptations: 1, iterations: 0, gradient_norm: 0.0, reason: "evaluated".into() };
        let mut settled = evaluate;
        let mut relaxation = Relaxation::default();
        let scale = tolerance_scale(self.subjects.len());
        while !settled && convergence.adaptations < MAX_ADAPTATIONS {
            let (held_optimum, iterations) = self.minimise_held(&phi, &adapted);
            convergence.iterations += iterations;
            let residual: Vec<f64> = held_optimum.iter().zip(&phi).map(|(a, b)| a - b).collect();
            // The held nodes describe the posteriors near φ only: a step whose covariance is not
            // valid, or (quadrature) whose re-adapted objective is worse than φ's, went where
            // they misled the minimiser, so it is shortened until it is not. Laplace's fixed
            // point is not a minimum of its re-adapted objective (the value depends on the
            // mode it is taken at), so there only validity is asked.
            let mut weight = relaxation.weight(&residual);
            let accepted = loop {
                let next: Vec<f64> = phi.iter().zip(&residual).map(|(x, r)| x + weight * r).collect();
                convergence.adaptations += 1;
                if let Ok(next_adapted) = self.adapt(&next, Some(&adapted)) {
                    let (next_value, gradient) = self.objective(&next, &next_adapted);
                    let lower = next_value <= value + RISE_TOLERANCE * scale;
                    if next_value.is_finite() && (lower || self.method == Method::Laplace) {
                        break Some((next, next_adapted, next_value, gradient));
                    }
                }
                weight *= 0.25;
                if weight < MIN_STEP_WEIGHT || convergence.adaptations >= MAX_ADAPTATIONS {
                    break None;
                }
                relaxation = Relaxation::default();
            };
            let Some((next, next_adapted, next_value, gradient)) = accepted else {
                convergence.reason = "no step from the last adaptation lowered the objective".into();
                break;
            };
            let step = residual.iter().fold(0.0f64, |m, r| m.max(r.abs()));
            let steep = gradient.iter().any(|g| g.abs() >= GRADIENT_TOLERANCE * scale);
            settled =
                step < STEP_TOLERANCE && (next_value - value).abs() < OBJECTIVE_TOLERANCE * scale && !steep;
            phi = next;
            adapted = next_adapted;
            value = next_value;
            convergence.reason = if settled {
                "the estimates and the objective stopped moving between adaptations, and the gradient is small".into()
            } else {
                format!("stopped after {MAX_ADAPTATIONS} adaptations")
            };
        }
        let (_, gradient) = self.objective(&phi, &adapted);
        convergence.gradient_norm = gradient.iter().fold(0.0, |m, g| m.max(g.abs()));
        let modes_found = adapted.iter().all(|a| a.converged);
        if !modes_found {
            convergence.reason += "; some conditional modes were not found";
        }
        let converged =
            settled && modes_found && (evaluate || convergence.gradient_norm < GRADIENT_TOLERANCE * scale);
        Ok(Found { phi, adapted, minus2ll: value, convergence, converged })
    }
}

/// The bounds of the relaxation weight: below 0.1 the iteration would stall, and above 5 one
/// extrapolation could carry φ far past a fixed point the ratio misjudged.
const MIN_WEIGHT: f64 = 0.1;
const MAX_WEIGHT: f64 = 5.0;

/// The step taken along the fixed-point residual r = T(φ) − φ, where T(φ) is the optimum with
/// the nodes (or, for Laplace, the modes) adapted at φ. T is not always a good contraction:
/// where a subject's posterior is far from Gaussian the rule's error moves with the nodes and
/// T overshoots (successive residuals point in opposite directions, and the plain iteration
/// φ ← T(φ) oscillates or settles into a cycle); with Laplace's held modes T undershoots
/// (residuals shrink by a steady factor near 0.8, and the plain iteration crawls). Near the
/// fixed point T is close to linear, r(φₖ₊₁) ≈ (1 − w(1 − λ))·r(φₖ) along the residual for a step
/// w·r and a slope λ of T, so the ratio of successive residuals estimates λ and w = 1/(1 − λ)
/// cancels it (a scalar secant step on the residual, derived here; with the last weight w′ and
/// the ratio ρ of the residuals' projections, λ = 1 + (ρ − 1)/w′). The weight is kept within
/// [0.1, 5]: a residual that stops shrinking (ρ ≥ 1) falls back to the plain step.
#[derive(Default)]
struct Relaxation {
    previous: Option<(Vec<f64>, f64)>,
}

impl Relaxation {
    fn weight(&mut self, residual: &[f64]) -> f64 {
        let weight = match &self.previous {
            Some((last, w)) => {
                let norm2: f64 = last.iter().map(|x| x * x).sum();
                let ratio =
                    residual.iter().zip(last).map(|(a, b)| a * b).sum::<f64>() / norm2.max(f64::MIN_POSITIVE);
                if norm2 > 0.0 && ratio < 1.0 {
                    (w / (1.0 - ratio)).clamp(MIN_WEIGHT, MAX_WEIGHT)
                } else {
                    1.0
                }
            }
            None => 1.0,
        };
        self.previous = Some((residual.to_vec(), weight));
        weight
    }
}

/// Where an estimation ended.
struct Found {
    phi: Vec<f64>,
    adapted: Vec<Adapted>,
    minus2ll: f64,
    convergence: Convergence,
    converged: bool,
}

/// Check that a study can inform a population model at all.
fn check_study(subjects: &[SubjectData], evaluate: bool) -> Result<(), String> {
    if subjects.is_empty() {
        return Err("no subject has both doses and levels: nothing to estimate from".into());
    }
    if subjects.len() < 2 && !evaluate {
        return Err(format!(
            "population estimation needs at least 2 subjects with levels, found {}: between-subject variability \
             cannot be estimated from fewer (fit a single subject with `cistern fit`)",
            subjects.len()
        ));
    }
    if subjects.iter().all(|s| s.levels.iter().all(|l| l.is_blq())) {
        return Err("every level is below the quantification limit: nothing to estimate a model from".into());
    }
    for s in subjects {
        crate::fit::check_levels(s)
            .map_err(|e| format!("subject {}: {e}", s.id.as_deref().unwrap_or("(unnamed)")))?;
    }
    Ok(())
}

/// Estimate the population model of `model`'s structure from `subjects` (or, with
/// `options.evaluate`, only evaluate it). Errors are the input's fault (exit code 2).
pub fn estimate(
    subjects: &[SubjectData],
    model: &PopulationModel,
    options: &Options,
) -> Result<summary::Estimation, Error> {
    check_study(subjects, options.evaluate).map_err(Error::Usage)?;
    let oral = subjects.iter().any(|s| s.doses.iter().any(|d| d.route == Route::Oral));
    if oral && model.absorption.is_none() {
        return Err(Error::Usage(
            "oral doses: the model needs an [absorption] table (ka, F, lag time)".into(),
        ));
    }
    if let Some(n) = options.nodes
        && !(1..=quadrature::MAX_NODES).contains(&n)
    {
        return Err(Error::Usage(format!(
            "--nodes: expected 1 to {} nodes per random effect, found {n}",
            quadrature::MAX_NODES
        )));
    }
    let (space, mut notes) = Space::new(model, oral);
    let mut run = Run::new(&space, subjects, options);
    let mut found = run.estimate(&space.start(), None, options.evaluate).map_err(Error::Usage)?;
    // Nodes chosen automatically: the first estimate used the ladder's first rule; choose the
    // rules where the estimate is (the posteriors there, not at the start model, decide the
    // accuracy of the objective reported) and estimate again from there until no rule grows.
    let mut accuracy = None;
    if options.method == Method::Quadrature && options.nodes.is_none() {
        for _ in 0..NODE_ROUNDS {
            let (grew, difference, adapted) =
                run.choose_nodes(&found.phi, std::mem::take(&mut found.adapted)).map_err(Error::Usage)?;
            accuracy = Some(difference);
            if !grew {
                found.adapted = adapted;
                break;
            }
            let previous = found.convergence.clone();
            found = run.estimate(&found.phi, Some(adapted), options.evaluate).map_err(Error::Usage)?;
            found.convergence.adaptations += previous.adaptations;
            found.convergence.iterations += previous.iterations;
        }
        let (lo, hi) = run.node_range();
        notes.push(format!(
            "Gauss–Hermite nodes chosen per subject and principal axis at the estimate: {lo} to {hi} per axis (successive rules agree within {})",
            accuracy.map_or(String::new(), |a| format!("{a:.1e}"))
        ));
    }
    let Found { phi, adapted, minus2ll, convergence, converged } = found;
    let values = space.values(&phi);
    let modes = subjects
        .iter()
        .zip(&adapted)
        .map(|(s, a)| (a.mode, space.prior_mean(&values, &s.covariates).map_or([0.0; MAX], |m| m.0)))
        .collect();
    let outcome = Outcome { space: space.clone(), phi, minus2ll, modes, converged, convergence };
    let covariance = (!options.evaluate).then(|| uncertainty::covariance(&run, &outcome.phi, &adapted));
    let bootstrap = if options.bootstrap > 0 && !options.evaluate {
        Some(uncertainty::bootstrap(subjects, &space, options, &run.nodes, &outcome.phi))
    } else {
        None
    };
    let nodes = (options.method == Method::Quadrature).then(|| summary::Nodes {
        min: run.node_range().0,
        max: run.node_range().1,
        successive_rules_differ_by: accuracy,
    });
    Ok(summary::Estimation::new(outcome, covariance, bootstrap, subjects, options, notes, nodes))
}

#[cfg(test)]
mod tests {
    use super::Relaxation;

    /// Iterates the relaxed step on a linear map T(φ) = λφ + c (fixed point c/(1 − λ)) and
    /// returns how many steps bring φ within 1e-10 of it.
    fn steps_to_fixed_point(lambda: f64) -> usize {
        let fixed = 1.0 / (1.0 - lambda);
        let (mut phi, mut relaxation) = (0.0, Relaxation::default());
        for k in 1..=200 {
            let residual = lambda * phi + 1.0 - phi;
            phi += relaxation.weight(&[residual]) * residual;
            if (phi - fixed).abs() < 1e-10 {
                return k;
            }
        }
        usize::MAX
    }

    #[test]
    fn relaxation_solves_a_linear_map_in_a_few_steps() {
        // The plain iteration needs about ln(1e-10)/ln|λ| steps: 103 at λ = 0.8, 219 at −0.9,
        // and never ends at λ = −1.5. The secant weight is exact on a line after its first
        // measured ratio (within the weight's bounds).
        assert!(steps_to_fixed_point(0.8) <= 3, "{}", steps_to_fixed_point(0.8));
        assert!(steps_to_fixed_point(-0.9) <= 3, "{}", steps_to_fixed_point(-0.9));
        assert!(steps_to_fixed_point(-1.5) <= 3, "{}", steps_to_fixed_point(-1.5));
        // λ = 0.95 needs w = 20, beyond the bound of 5: then it contracts by 1 − 5·0.05 = 0.75.
        assert!(steps_to_fixed_point(0.95) < 120, "{}", steps_to_fixed_point(0.95));
    }
}
