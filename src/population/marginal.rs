//! One subject's marginal likelihood Lᵢ = ∫ p(yᵢ | θ)·N(θ; μᵢ, Ω) dθ over its individual
//! log-parameters θ = (ln CL, ln V[, ln ka]).
//!
//! **Adaptive Gauss–Hermite quadrature** (Pinheiro & Bates 1995): with θ̂ the conditional mode
//! and H the Hessian of c(θ) = −2 ln[p(y | θ)·N(θ; μ, Ω)] there, Σ = (H/2)⁻¹ = U·Λ·Uᵀ (its
//! principal axes) and A = U·Λ^½, the nodes are θₖ = θ̂ + √2·A·xₖ for the product rule's points
//! xₖ and
//!
//! ```text
//! Lᵢ ≈ |det √2·A| · Σₖ wₖ·e^(|xₖ|²) · p(y | θₖ)·N(θₖ; μ, Ω)
//! ```
//!
//! The product rule may have a different number of nodes along each principal axis: a sparse
//! subject's posterior is often far from Gaussian along one axis only (the data inform one
//! combination of the parameters, the prior the others).
//!
//! exact when the integrand is a Gaussian times a polynomial of degree below 2·nodes.
//!
//! **Laplace** (one node, the curvature replaced by its expectation given θ̂ — the conditional
//! approximation with interaction, Wang 2007, doi:10.1007/s10928-007-9060-6):
//! −2 ln Lᵢ ≈ c_y(θ̂) + (θ̂ − μ)ᵀΩ⁻¹(θ̂ − μ) + ln det(2πΩ) − n·ln 2π + ln det(H_y/2 + Ω⁻¹), with c_y the
//! data part of c and H_y its expected Hessian: Σ 2∇f∇fᵀ/V + ∇V∇Vᵀ/V² over quantified levels
//! (V = a² + b²f²) and the Gauss–Newton part 2λ(λ + z)∇z∇zᵀ of −2 ln Φ(z) over levels below the
//! limit (z = (LLOQ − f)/√V, λ = φ(z)/Φ(z)).
//!
//! An adaptation (mode, curvature, nodes and the predictions at the nodes) is made at one φ
//! and then reused while the optimiser moves φ: the nodes stay where the posterior is, the
//! predictions need no new run of the engine, and only the prior density and the residual
//! terms change (past the memory cap, a subject's nodes are placed again, to the same points
//! and predictions, at each evaluation). The estimator re-adapts until φ no longer moves
//! (docs/methods.md).

use super::Counts;
use super::quadrature::{self, Rule};
use crate::engine::scalar::Dual;
use crate::fit::SubjectData;
use crate::fit::linalg::{MAX, Mat, cholesky, log_det, spd_inverse};
use crate::fit::objective::{D3, Fixed, Likelihood, Prior, Problem, level_term, ln_norm_cdf_slope};
use crate::fit::optimise;
use crate::io::levels::Level;
use crate::model::Residual;
use nalgebra::{DMatrix, SymmetricEigen};
use std::f64::consts::PI;

/// What a subject's likelihood needs of the population at one φ.
#[derive(Debug, Clone)]
pub struct Population<'a> {
    /// Random effects: 2 or 3.
    pub n: usize,
    /// Ω.
    pub omega: &'a Mat,
    /// Ω⁻¹.
    pub precision: Mat,
    /// ln det(2πΩ).
    pub ln_det_2pi_omega: f64,
    /// (a, b) of σ² = a² + (b·f)².
    pub residual: [f64; 2],
    /// ka when it is not a random effect (1/h), F and the lag time.
    pub fixed_ka: Option<f64>,
    /// Bioavailability.
    pub f: f64,
    /// Lag time (h).
    pub tlag_h: f64,
}

impl<'a> Population<'a> {
    /// `None` when Ω is not positive definite.
    pub fn new(
        n: usize,
        omega: &'a Mat,
        residual: [f64; 2],
        absorption: (Option<f64>, f64, f64),
    ) -> Option<Self> {
        let l = cholesky(omega, n)?;
        Some(Population {
            n,
            omega,
            precision: spd_inverse(omega, n)?,
            ln_det_2pi_omega: log_det(&l, n) + n as f64 * (2.0 * PI).ln(),
            residual,
            fixed_ka: absorption.0,
            f: absorption.1,
            tlag_h: absorption.2,
        })
    }

    fn problem(&self, subject: &SubjectData, mean: [f64; MAX]) -> Problem {
        Problem::new(
            &subject.doses,
            &subject.levels,
            Fixed { n: self.n, ka_per_h: self.fixed_ka, f: self.f, tlag_h: self.tlag_h },
            Likelihood::Bayes(Residual {
                additive_mg_l: self.residual[0],
                proportional_cv: self.residual[1],
            }),
            Some(Prior { mean, precision: self.precision }),
        )
    }
}

/// One quadrature node with the predictions there.
#[derive(Debug, Clone)]
struct Node {
    theta: [f64; MAX],
    /// ln(wₖ·e^(|xₖ|²)·|det √2·L|).
    ln_weight: f64,
    predictions: Vec<f64>,
    sums: Sums,
}

/// Sums over a node's quantified levels that φ does not move (the predictions are held between
/// adaptations): with a purely additive or purely proportional residual error they make the
/// node's data term a few operations instead of a logarithm per level.
#[derive(Debug, Clone, Copy)]
struct Sums {
    /// Σ (y − f)².
    squares: f64,
    /// Σ ((y − f)/f)².
    relative_squares: f64,
    /// Σ ln f².
    ln_f2: f64,
    /// Every prediction at a quantified level is above 0 (the two relative sums are finite).
    positive: bool,
}

impl Sums {
    fn new(levels: &[Level], predictions: &[f64]) -> Sums {
        let mut sums = Sums { squares: 0.0, relative_squares: 0.0, ln_f2: 0.0, positive: true };
        for (level, &f) in levels.iter().zip(predictions) {
            if let Some(y) = level.conc_mg_l {
                let r = y - f;
                sums.squares += r * r;
                sums.positive &= f > 0.0;
                if f > 0.0 {
                    sums.relative_squares += (r / f).powi(2);
                    sums.ln_f2 += (f * f).ln();
                }
            }
        }
        sums
    }
}

impl Node {
    fn new(levels: &[Level], theta: [f64; MAX], ln_weight: f64, predictions: Vec<f64>) -> Node {
        Node { theta, ln_weight, sums: Sums::new(levels, &predictions), predictions }
    }
}

/// A subject adapted at one φ.
#[derive(Debug, Clone)]
pub struct Adapted {
    /// The conditional mode θ̂.
    pub mode: [f64; MAX],
    /// Whether the mode search converged.
    pub converged: bool,
    nodes: Nodes,
}

/// A subject's nodes between adaptations: held with their predictions, or, where holding them
/// would take more than the subject's share of the memory budget, only placed (the predictions
/// are then worked out again at every evaluation, to the same values).
/// Laplace's one node carries the slopes of its predictions.
#[derive(Debug, Clone)]
enum Nodes {
    Laplace {
        node: Node,
        /// ∇f at θ̂ for each level.
        slopes: Vec<[f64; MAX]>,
    },
    Held(Vec<Node>),
    Placed(Placement),
}

/// Where a product rule's nodes lie: θₖ = θ̂ + √2·A·xₖ, with weight ln(wₖ·e^(|xₖ|²)) + ln|det √2·A|.
#[derive(Debug, Clone, Copy)]
struct Placement {
    /// A = U·Λ^½.
    axes: Mat,
    /// ln|det √2·A|.
    ln_det: f64,
    /// Nodes along each axis.
    counts: Counts,
}

impl Placement {
    /// Every node's θ and ln weight, in the product grid's order (the first axis fastest).
    fn nodes(&self, mode: &[f64; MAX], n: usize) -> impl Iterator<Item = ([f64; MAX], f64)> + '_ {
        let rules: Vec<&Rule> = self.counts[..n].iter().map(|&c| quadrature::rule(c)).collect();
        let size = rules.iter().map(|r| r.nodes.len()).product();
        let mode = *mode;
        (0..size).map(move |mut index| {
            // Every combination of the rules' nodes; none is pruned: where the posterior has
            // heavier tails than its Gaussian approximation, the outer points carry weight.
            let mut x = [0.0; MAX];
            let mut ln_w = 0.0;
            for (xd, rule) in x.iter_mut().zip(&rules) {
                let i = index % rule.nodes.len();
                index /= rule.nodes.len();
                *xd = rule.nodes[i];
                ln_w += rule.ln_weights[i] + rule.nodes[i] * rule.nodes[i];
            }
            let mut theta = mode;
            for i in 0..n {
                theta[i] += 2f64.sqrt() * (0..n).map(|j| self.axes[i][j] * x[j]).sum::<f64>();
            }
            (theta, ln_w + self.ln_det)
        })
    }
}

/// The memory a held node takes with `levels` predictions (its allocation's bookkeeping
/// included, about two words).
fn held_node_bytes(levels: usize) -> usize {
    std::mem::size_of::<Node>() + levels * std::mem::size_of::<f64>() + 16
}

/// A subject's −2 ln Lᵢ and its slopes with respect to what φ moves.
#[derive(Debug, Clone, Copy)]
pub struct Terms {
    /// −2 ln Lᵢ.
    pub value: f64,
    /// ∂/∂μ.
    pub d_mu: [f64; MAX],
    /// ∂/∂Ω (symmetric; both triangles carry the slope of the entry).
    pub d_omega: Mat,
    /// ∂/∂ln a and ∂/∂ln b.
    pub d_residual: [f64; 2],
}

/// A = U·Λ^½ for a positive-definite Σ = U·Λ·Uᵀ, the axes ordered by falling variance (ties by
/// index, so the order is reproducible), with ln |det A|; `None` when Σ is not positive definite.
fn principal_axes(sigma: &Mat, n: usize) -> Option<(Mat, f64)> {
    let eigen = SymmetricEigen::new(DMatrix::from_fn(n, n, |i, j| sigma[i][j]));
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| eigen.eigenvalues[j].total_cmp(&eigen.eigenvalues[i]).then(i.cmp(&j)));
    let mut a = [[0.0; MAX]; MAX];
    let mut ln_det = 0.0;
    for (k, &axis) in order.iter().enumerate() {
        let lambda = eigen.eigenvalues[axis];
        if !(lambda > 0.0 && lambda.is_finite()) {
            return None;
        }
        ln_det += 0.5 * lambda.ln();
        for i in 0..n {
            a[i][k] = eigen.eigenvectors[(i, axis)] * lambda.sqrt();
        }
    }
    Some((a, ln_det))
}

/// Find the subject's conditional mode at `mean` (warm-started from `previous`) and place the
/// nodes there: the product grid of `counts` Gauss–Hermite nodes along the posterior's
/// principal axes, held with their predictions when they take at most `hold_bytes`, or
/// (`counts` = `None`) the Laplace point.
pub fn adapt(
    subject: &SubjectData,
    population: &Population,
    mean: [f64; MAX],
    previous: Option<&[f64; MAX]>,
    counts: Option<&Counts>,
    hold_bytes: usize,
) -> Adapted {
    let n = population.n;
    let problem = population.problem(subject, mean);
    let mut opt = optimise::minimise(&problem, &previous.unwrap_or(&mean)[..n]);
    if !opt.converged && previous.is_some() {
        let fresh = optimise::minimise(&problem, &mean[..n]);
        if fresh.converged || fresh.cost < opt.cost {
            opt = fresh;
        }
    }
    let mut mode = [0.0; MAX];
    mode[..n].copy_from_slice(&opt.theta[..n]);
    let Some(&counts) = counts else {
        let duals: Vec<D3> = (0..n).map(|i| D3::var(mode[i], i)).collect();
        let slopes = problem.predictions(&duals).iter().map(|f| f.d).collect::<Vec<_>>();
        let predictions = problem.predictions(&mode[..n]);
        return Adapted {
            mode,
            converged: opt.converged,
            nodes: Nodes::Laplace { node: Node::new(&subject.levels, mode, 0.0, predictions), slopes },
        };
    };
    // The curvature at the mode; where it is not positive definite (a mode not found), the
    // Gauss–Newton curvature, which includes the prior's and always is.
    let half = |m: Mat| m.map(|row| row.map(|x| 0.5 * x));
    let covariance = spd_inverse(&half(opt.hessian), n)
        .or_else(|| spd_inverse(&half(problem.gauss_newton(&mode[..n])), n));
    let (axes, ln_det_a) = covariance.as_ref().and_then(|c| principal_axes(c, n)).unwrap_or_else(|| {
        let mut a = [[0.0; MAX]; MAX];
        (0..n).for_each(|i| a[i][i] = population.omega[i][i].sqrt());
        (a, (0..n).map(|i| a[i][i].ln()).sum())
    });
    let placement = Placement { axes, ln_det: ln_det_a + n as f64 * 0.5 * 2f64.ln(), counts };
    let size: usize = counts[..n].iter().product();
    let nodes = if size.saturating_mul(held_node_bytes(subject.levels.len())) <= hold_bytes {
        Nodes::Held(
            placement
                .nodes(&mode, n)
                .map(|(theta, ln_w)| {
                    Node::new(&subject.levels, theta, ln_w, problem.predictions(&theta[..n]))
                })
                .collect(),
        )
    } else {
        Nodes::Placed(placement)
    };
    Adapted { mode, converged: opt.converged, nodes }
}

impl Adapted {
    /// Visit every quadrature node in the grid's order until `visit` returns false; whether
    /// all were visited. Placed nodes get their predictions from `subject`'s doses here.
    fn for_each_node(
        &self,
        subject: &SubjectData,
        population: &Population,
        mean: [f64; MAX],
        mut visit: impl FnMut(&Node) -> bool,
    ) -> bool {
        match &self.nodes {
            Nodes::Laplace { node, .. } => visit(node),
            Nodes::Held(nodes) => nodes.iter().all(visit),
            Nodes::Placed(placement) => {
                let problem = population.problem(subject, mean);
                placement.nodes(&self.mode, population.n).all(|(theta, ln_w)| {
                    let predictions = problem.predictions(&theta[..population.n]);
                    visit(&Node::new(&subject.levels, theta, ln_w, predictions))
                })
            }
        }
    }
}

/// The residual error as a subject's data terms use it at one φ, worked out once per subject
/// and evaluation rather than once per node.
struct ResidualTerms {
    /// (a, b) of σ² = a² + (b·f)².
    residual: [f64; 2],
    /// The number of levels above the limit.
    quantified: f64,
    /// ln(2π·a²) and ln(2π·b²).
    ln_2pi_squares: [f64; 2],
}

impl ResidualTerms {
    fn new(levels: &[Level], residual: [f64; 2]) -> ResidualTerms {
        ResidualTerms {
            residual,
            quantified: levels.iter().filter(|l| l.conc_mg_l.is_some()).count() as f64,
            ln_2pi_squares: residual.map(|r| (2.0 * PI * r * r).ln()),
        }
    }
}

/// −2 ln p(y | θ) from the predictions at a node, with its slopes in ln a and ln b.
fn data_term(levels: &[Level], node: &Node, terms: &ResidualTerms) -> Dual<2> {
    let [a, b] = terms.residual;
    let (sums, q) = (&node.sums, terms.quantified);
    // Σ [ln(2π·σ²) + r²/σ²] over the quantified levels, in closed form where σ² is a² (the
    // same for every level) or b²f².
    let closed = if b == 0.0 && a > 0.0 {
        let var = a * a;
        Some(Dual {
            v: q * terms.ln_2pi_squares[0] + sums.squares / var,
            d: [2.0 * q - 2.0 * sums.squares / var, 0.0],
        })
    } else if a == 0.0 && b > 0.0 && sums.positive {
        let var = b * b;
        Some(Dual {
            v: q * terms.ln_2pi_squares[1] + sums.ln_f2 + sums.relative_squares / var,
            d: [0.0, 2.0 * q - 2.0 * sums.relative_squares / var],
        })
    } else {
        None
    };
    let mut total = closed.unwrap_or(Dual { v: 0.0, d: [0.0; 2] });
    for (level, &f) in levels.iter().zip(&node.predictions) {
        if closed.is_some() && level.conc_mg_l.is_some() {
            continue;
        }
        let bf2 = (b * f).powi(2);
        let var = Dual { v: a * a + bf2, d: [2.0 * a * a, 2.0 * bf2] };
        total += level_term(level, Dual { v: f, d: [0.0; 2] }, var);
    }
    total
}

/// The Laplace curvature H_y/2 + Ω⁻¹ at the mode for residual (a, b) (see the module's text).
fn laplace_curvature(
    levels: &[Level],
    (node, slopes): (&Node, &[[f64; MAX]]),
    population: &Population,
    residual: [f64; 2],
) -> Mat {
    let n = population.n;
    let [a, b] = residual;
    let mut m = population.precision;
    for ((level, &f), g) in levels.iter().zip(&node.predictions).zip(slopes) {
        let var = a * a + (b * f).powi(2);
        if var <= 0.0 {
            continue;
        }
        let dvar: Vec<f64> = (0..n).map(|i| 2.0 * b * b * f * g[i]).collect();
        let mut add = |w: f64, u: &[f64]| {
            for i in 0..n {
                for j in 0..n {
                    m[i][j] += 0.5 * w * u[i] * u[j];
                }
            }
        };
        match (level.conc_mg_l, level.lloq_mg_l) {
            (Some(_), _) => {
                add(2.0 / var, &g[..n]);
                add(1.0 / (var * var), &dvar);
            }
            (None, Some(lloq)) => {
                let z = (lloq - f) / var.sqrt();
                let lambda = ln_norm_cdf_slope(z);
                let dz: Vec<f64> = (0..n).map(|i| -g[i] / var.sqrt() - z * dvar[i] / (2.0 * var)).collect();
                add(2.0 * lambda * (lambda + z), &dz);
            }
            (None, None) => {}
        }
    }
    m
}

/// ln det of a positive-definite matrix, or +∞ when it is not one.
fn ln_det_or_infinite(m: &Mat, n: usize) -> f64 {
    cholesky(m, n).map_or(f64::INFINITY, |l| log_det(&l, n))
}

/// The subject's −2 ln Lᵢ at `mean` and `population`, with the nodes of `adapted`, and its slopes.
pub fn terms(subject: &SubjectData, adapted: &Adapted, population: &Population, mean: &[f64; MAX]) -> Terms {
    let levels = &subject.levels[..];
    let n = population.n;
    let p = &population.precision;
    let residual = ResidualTerms::new(levels, population.residual);
    // u = Ω⁻¹(θ − μ) and the quadratic form (θ − μ)ᵀΩ⁻¹(θ − μ).
    let deviation = |theta: &[f64; MAX]| {
        let mut d = [0.0; MAX];
        (0..n).for_each(|i| d[i] = theta[i] - mean[i]);
        let mut u = [0.0; MAX];
        (0..n).for_each(|i| u[i] = (0..n).map(|j| p[i][j] * d[j]).sum());
        (u, (0..n).map(|i| d[i] * u[i]).sum::<f64>())
    };
    let mut out = Terms { value: 0.0, d_mu: [0.0; MAX], d_omega: [[0.0; MAX]; MAX], d_residual: [0.0; 2] };
    if let Nodes::Laplace { node, slopes } = &adapted.nodes {
        let data = data_term(levels, node, &residual);
        let (u, q) = deviation(&node.theta);
        let m = laplace_curvature(levels, (node, slopes), population, population.residual);
        let ln_det_m = ln_det_or_infinite(&m, n);
        out.value = data.v + q + population.ln_det_2pi_omega - n as f64 * (2.0 * PI).ln() + ln_det_m;
        let m_inv = spd_inverse(&m, n).unwrap_or([[0.0; MAX]; MAX]);
        for i in 0..n {
            out.d_mu[i] = -2.0 * u[i];
            for j in 0..n {
                // ∂(ln det M)/∂Ω = −Ω⁻¹·M⁻¹·Ω⁻¹.
                let pmp: f64 =
                    (0..n).map(|k| (0..n).map(|l| p[i][k] * m_inv[k][l] * p[l][j]).sum::<f64>()).sum();
                out.d_omega[i][j] = p[i][j] - u[i] * u[j] - pmp;
            }
        }
        // The curvature's slope in ln a and ln b by central differences (h = 1e-5).
        for (r, slot) in out.d_residual.iter_mut().enumerate() {
            let shifted = |h: f64| {
                let mut res = population.residual;
                res[r] *= h.exp();
                ln_det_or_infinite(&laplace_curvature(levels, (node, slopes), population, res), n)
            };
            let h = 1e-5;
            let slope =
                if population.residual[r] > 0.0 { (shifted(h) - shifted(-h)) / (2.0 * h) } else { 0.0 };
            *slot = data.d[r] + slope;
        }
        return out;
    }
    // A log-sum-exp over the nodes' contributions sₖ, in one pass: the sums are kept scaled by
    // e^(−top), top the largest sₖ so far, and rescaled when it grows. The slopes are the
    // contributions' softmax averages of each node's own slopes.
    let (mut top, mut sum) = (f64::NEG_INFINITY, 0.0);
    let (mut wu, mut wuu, mut wres) = ([0.0; MAX], [[0.0; MAX]; MAX], [0.0; 2]);
    let finite = adapted.for_each_node(subject, population, *mean, |node| {
        let data = data_term(levels, node, &residual);
        let (u, q) = deviation(&node.theta);
        let s = node.ln_weight - 0.5 * (data.v + q + population.ln_det_2pi_omega);
        if s.is_nan() {
            return false;
        }
        if s == f64::NEG_INFINITY {
            return true;
        }
        if s > top {
            let scale = (top - s).exp();
            sum *= scale;
            wu.iter_mut().for_each(|x| *x *= scale);
            wuu.iter_mut().flatten().for_each(|x| *x *= scale);
            wres.iter_mut().for_each(|x| *x *= scale);
            top = s;
        }
        let w = (s - top).exp();
        if w == 0.0 {
            return true;
        }
        sum += w;
        for i in 0..n {
            wu[i] += w * u[i];
            for j in 0..n {
                wuu[i][j] += w * u[i] * u[j];
            }
        }
        for r in 0..2 {
            wres[r] += w * data.d[r];
        }
        true
    });
    if !finite || !top.is_finite() || !sum.is_finite() {
        out.value = f64::INFINITY;
        return out;
    }
    out.value = -2.0 * (top + sum.ln());
    for i in 0..n {
        out.d_mu[i] = -2.0 * wu[i] / sum;
        for j in 0..n {
            out.d_omega[i][j] = p[i][j] - wuu[i][j] / sum;
        }
    }
    for r in 0..2 {
        out.d_residual[r] = wres[r] / sum;
    }
    out
}
