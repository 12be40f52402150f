//! The uncertainty of the population estimates: the observed information (the Hessian of
//! −2 ln L at the optimum, by central differences of its exact gradient), and the case
//! bootstrap (subjects resampled with replacement, each replicate estimated from the optimum).
//!
//! With quadrature the differences keep the nodes of the optimum: a rule whose nodes are held
//! is still a quadrature of the same integral, and a shift of 1e-4 in φ leaves them where the
//! posterior is, so its error stays the rule's (below 1e-7 in −2 ln Lᵢ) while no subject's
//! predictions are computed again. Laplace's value depends on the conditional mode it is taken
//! at, so there every subject is re-adapted at each shifted point.

use super::marginal::Adapted;
use super::space::Space;
use super::{Counts, Method, Options, Run};
use crate::fit::SubjectData;
use crate::seeds::Seeds;
use nalgebra::{DMatrix, SymmetricEigen};
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rayon::prelude::*;

/// The covariance of φ̂, or why there is none.
#[derive(Debug, Clone)]
pub struct Covariance {
    /// Cov(φ̂) = (H/2)⁻¹, when H is positive definite.
    pub matrix: Option<DMatrix<f64>>,
    /// The entries of φ the data do not identify (the largest components of the eigenvectors
    /// of H with eigenvalues near zero or below), by index.
    pub unidentified: Vec<usize>,
}

/// Step of the central differences, in units of φ (logarithms and atanh of the estimates).
const STEP: f64 = 1e-4;

/// The covariance of φ̂ at `phi`, adapted as `adapted`.
pub(super) fn covariance(run: &Run, phi: &[f64], adapted: &[Adapted]) -> Covariance {
    let p = phi.len();
    if p == 0 {
        return Covariance { matrix: None, unidentified: Vec::new() };
    }
    let columns: Vec<Option<Vec<f64>>> = (0..p)
        .map(|k| {
            let gradient_at = |shift: f64| {
                let mut x = phi.to_vec();
                x[k] += shift;
                let (value, g) = match run.method {
                    Method::Quadrature => run.objective(&x, adapted),
                    Method::Laplace => run.objective(&x, &run.adapt(&x, Some(adapted)).ok()?),
                };
                value.is_finite().then_some(g)
            };
            let (up, down) = (gradient_at(STEP)?, gradient_at(-STEP)?);
            Some(up.iter().zip(&down).map(|(u, d)| (u - d) / (2.0 * STEP)).collect())
        })
        .collect();
    let mut h = DMatrix::zeros(p, p);
    for (k, column) in columns.iter().enumerate() {
        let Some(column) = column else {
            return Covariance { matrix: None, unidentified: vec![k] };
        };
        for i in 0..p {
            h[(i, k)] = column[i];
        }
    }
    let h = (&h + h.transpose()) * 0.5;
    let eigen = SymmetricEigen::new(h.clone());
    let largest = eigen.eigenvalues.iter().fold(0.0f64, |m, &e| m.max(e.abs()));
    let mut unidentified = Vec::new();
    for (i, &e) in eigen.eigenvalues.iter().enumerate() {
        if e <= 1e-8 * largest {
            let v = eigen.eigenvectors.column(i);
            let biggest = v.iter().fold(0.0f64, |m, x| m.max(x.abs()));
            unidentified.extend((0..p).filter(|&j| v[j].abs() >= 0.3 * biggest));
        }
    }
    unidentified.sort_unstable();
    unidentified.dedup();
    let matrix = if unidentified.is_empty() { (h * 0.5).cholesky().map(|c| c.inverse()) } else { None };
    Covariance { matrix, unidentified }
}

/// Bootstrap replicates: φ̂ of each (None where the estimation failed) and whether it converged.
#[derive(Debug, Clone)]
pub struct Bootstrap {
    /// One entry per replicate, in replicate order.
    pub replicates: Vec<(Option<Vec<f64>>, bool)>,
}

/// `options.bootstrap` replicates of the study, each resampled with its own seed and estimated
/// from `phi`; the same whatever the thread count.
pub(super) fn bootstrap(
    subjects: &[SubjectData],
    space: &Space,
    options: &Options,
    nodes: &[Counts],
    phi: &[f64],
) -> Bootstrap {
    let seeds = Seeds(options.seed);
    let replicates = (0..options.bootstrap as u64)
        .into_par_iter()
        .map(|r| {
            let mut rng = StdRng::seed_from_u64(seeds.bootstrap_replicate(r));
            let picks: Vec<usize> =
                (0..subjects.len()).map(|_| rng.random_range(0..subjects.len())).collect();
            let sample: Vec<SubjectData> = picks.iter().map(|&i| subjects[i].clone()).collect();
            let mut run = Run::new(space, &sample, options);
            // Each resampled subject keeps the rule size chosen for it in the full study.
            run.nodes = picks.iter().map(|&i| nodes[i]).collect();
            match run.estimate(phi, None, false) {
                Ok(found) => (Some(found.phi), found.converged),
                Err(_) => (None, false),
            }
        })
        .collect();
    Bootstrap { replicates }
}
