//! The conditional weighted residuals and the normalised prediction distribution errors of one
//! subject (docs/methods.md, section 12).
//!
//! **CWRES** (Hooker, Staatz & Karlsson, Pharm Res 2007;24:2187–2197): the model linearised in
//! the random effects around the conditional mode η̂, with G = ∂f/∂η at η̂,
//!
//! ```text
//! E(y) ≈ f(η̂) − G·η̂        Cov(y) ≈ G·Ω·Gᵀ + diag(σ²(f(η̂)))        CWRES = Cov(y)^(−1/2)·(y − E(y))
//! ```
//!
//! over the quantified levels (the residual variance at the individual prediction: the form
//! with interaction). Levels below the limit have no CWRES; they act through the mode, which the
//! M3 likelihood found.
//!
//! **NPDE** (Brendel et al., Pharm Res 2006;23:2036–2049; Comets, Brendel & Mentré, Comput
//! Methods Programs Biomed 2008;90:154–166): K data sets of the subject's own design simulated
//! from the population model; their mean E and covariance V decorrelate the observed and the
//! simulated vectors, y* = V^(−1/2)(y − E); pde_j is the share of simulated y*_j below the
//! observed one, set to 1/(2K) or 1 − 1/(2K) when it is 0 or 1, and npde_j = Φ⁻¹(pde_j). A level
//! below the limit is first replaced (derived here, after the published idea of drawing its
//! pde within the censored probability): with p the share of simulations of that level below
//! its limit, u is drawn uniformly in [0, p] and the level imputed as the u-quantile of its
//! simulated values; then it is decorrelated with the others.

use crate::fit::linalg::{MAX, Mat, cholesky};
use crate::fit::objective::{D3, Fixed, Likelihood, Problem};
use crate::io::levels::Level;
use crate::model::Residual;
use nalgebra::{DMatrix, DVector};
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use statrs::distribution::{ContinuousCDF, Normal, Uniform};

/// The population model as one subject sees it: its typical log-parameters, Ω, the residual
/// error and what is not estimated.
#[derive(Debug, Clone)]
pub struct Typical {
    /// μ = ln of the covariate-adjusted typical CL, V (and ka).
    pub mean: [f64; MAX],
    /// Ω (the top-left n × n is used).
    pub omega: Mat,
    /// The residual error model.
    pub residual: Residual,
    /// n, and ka (when not random), F and the lag time.
    pub fixed: Fixed,
}

impl Typical {
    fn problem(&self, doses: &[crate::Dose], levels: &[Level]) -> Problem {
        Problem::new(doses, levels, self.fixed, Likelihood::Bayes(self.residual), None)
    }

    /// The predictions at θ for `levels`.
    pub fn predictions(&self, doses: &[crate::Dose], levels: &[Level], theta: &[f64]) -> Vec<f64> {
        self.problem(doses, levels).predictions(&theta[..self.fixed.n])
    }
}

/// The symmetric inverse square root of a symmetric positive-definite matrix; `None` when it
/// is not positive definite.
fn inverse_sqrt(m: DMatrix<f64>) -> Option<DMatrix<f64>> {
    let e = m.symmetric_eigen();
    let largest = e.eigenvalues.iter().fold(0.0f64, |a, b| a.max(b.abs()));
    if e.eigenvalues.iter().any(|&l| !l.is_finite() || l <= 1e-12 * largest) {
        return None;
    }
    let d = DMatrix::from_diagonal(&e.eigenvalues.map(|l| 1.0 / l.sqrt()));
    Some(&e.eigenvectors * d * e.eigenvectors.transpose())
}

/// CWRES of the quantified levels (in the order of `levels`, `None` below the limit), at the
/// conditional mode `mode`. `None` for all when Cov(y) is not positive definite.
pub fn cwres(
    typical: &Typical,
    doses: &[crate::Dose],
    levels: &[Level],
    mode: &[f64; MAX],
) -> Vec<Option<f64>> {
    let n = typical.fixed.n;
    let problem = typical.problem(doses, levels);
    let duals: Vec<D3> = (0..n).map(|i| D3::var(mode[i], i)).collect();
    let f = problem.predictions(&duals);
    let quantified: Vec<usize> = (0..levels.len()).filter(|&i| levels[i].conc_mg_l.is_some()).collect();
    let m = quantified.len();
    let mut out = vec![None; levels.len()];
    if m == 0 {
        return out;
    }
    let g = DMatrix::from_fn(m, n, |r, c| f[quantified[r]].d[c]);
    let omega = DMatrix::from_fn(n, n, |r, c| typical.omega[r][c]);
    let eta = DVector::from_fn(n, |i, _| mode[i] - typical.mean[i]);
    let fitted = DVector::from_fn(m, |r, _| f[quantified[r]].v);
    let expected = &fitted - &g * &eta;
    let variance = DMatrix::from_diagonal(&fitted.map(|v| typical.residual.variance(v)));
    let cov = &g * omega * g.transpose() + variance;
    let Some(w) = inverse_sqrt(cov) else { return out };
    let y = DVector::from_fn(m, |r, _| levels[quantified[r]].conc_mg_l.unwrap_or(0.0));
    let c = w * (y - expected);
    for (r, &i) in quantified.iter().enumerate() {
        out[i] = c[r].is_finite().then_some(c[r]);
    }
    out
}

/// NPDE of every level (in the order of `levels`) from `simulations` simulated data sets drawn
/// with `seed`. `None` for all when the simulated covariance is not positive definite or Ω has
/// no Cholesky factor.
pub fn npde(
    typical: &Typical,
    doses: &[crate::Dose],
    levels: &[Level],
    simulations: usize,
    seed: u64,
) -> Vec<Option<f64>> {
    let n = typical.fixed.n;
    let m = levels.len();
    let none = vec![None; m];
    let (Some(l), Ok(normal), Ok(unit)) =
        (cholesky(&typical.omega, n), Normal::new(0.0, 1.0), Uniform::new(0.0, 1.0))
    else {
        return none;
    };
    if m == 0 || simulations < 2 {
        return none;
    }
    let problem = typical.problem(doses, levels);
    let mut rng = StdRng::seed_from_u64(seed);
    // Simulated data sets, one row each: random effects first, then the residual errors.
    let sims: Vec<Vec<f64>> = (0..simulations)
        .map(|_| {
            let z: Vec<f64> = (0..n).map(|_| normal.sample(&mut rng)).collect();
            let mut theta = [0.0; MAX];
            for i in 0..n {
                theta[i] = typical.mean[i] + (0..=i).map(|j| l[i][j] * z[j]).sum::<f64>();
            }
            let f = problem.predictions(&theta[..n]);
            f.iter().map(|&fi| fi + typical.residual.variance(fi).sqrt() * normal.sample(&mut rng)).collect()
        })
        .collect();
    let k = simulations as f64;
    let mean = DVector::from_fn(m, |j, _| sims.iter().map(|s| s[j]).sum::<f64>() / k);
    let cov = DMatrix::from_fn(m, m, |a, b| {
        sims.iter().map(|s| (s[a] - mean[a]) * (s[b] - mean[b])).sum::<f64>() / (k - 1.0)
    });
    // Levels below the limit: imputed within the censored part of their simulated distribution.
    let observed = DVector::from_fn(m, |j, _| match (levels[j].conc_mg_l, levels[j].lloq_mg_l) {
        (Some(y), _) => y,
        (None, lloq) => {
            let lloq = lloq.unwrap_or(0.0);
            let mut column: Vec<f64> = sims.iter().map(|s| s[j]).collect();
            column.sort_by(f64::total_cmp);
            let below = column.iter().filter(|&&v| v < lloq).count() as f64 / k;
            let u = below * unit.sample(&mut rng);
            column[((u * k) as usize).min(simulations - 1)]
        }
    });
    let Some(w) = inverse_sqrt(cov) else { return none };
    let decorrelated = &w * (observed - &mean);
    let mut below = vec![0usize; m];
    for s in &sims {
        let sim = &w * (DVector::from_column_slice(s) - &mean);
        for j in 0..m {
            if sim[j] < decorrelated[j] {
                below[j] += 1;
            }
        }
    }
    below
        .iter()
        .map(|&b| {
            let pde = (b as f64 / k).clamp(0.5 / k, 1.0 - 0.5 / k);
            Some(normal.inverse_cdf(pde))
        })
        .collect()
}
