//! A population analysis of a study: the estimation, its diagnostics and each subject's
//! individual fit against the estimated model, shared by `cistern population` and the
//! population report.

use crate::diagnostics::{Diagnostics, SIMULATIONS, for_population};
use crate::fit::{FitOptions, FitResult, Intervals, SubjectData, fit_all};
use crate::population::summary::Estimation;
use crate::population::{Options, estimate};

/// Each subject's MAP fit against the estimated model, with Laplace intervals: exactly what
/// `fit --method map` gives with the model `--model-out` writes (subjects that cannot be
/// fitted are left out).
pub fn individual_fits(subjects: &[SubjectData], estimation: &Estimation, seed: u64) -> Vec<FitResult> {
    let options = FitOptions { intervals: Intervals::Laplace, seed, ..FitOptions::default() };
    fit_all(subjects, Some(&estimation.model), &options).into_iter().flatten().collect()
}

/// Estimate the population model from `subjects`, starting at `model`, and its diagnostics
/// against the estimated model (their warnings added to the estimation's).
pub fn estimate_and_diagnose(
    subjects: &[SubjectData],
    model: &crate::PopulationModel,
    options: &Options,
) -> crate::Result<(Estimation, Diagnostics)> {
    let mut estimation = estimate(subjects, model, options)?;
    let diagnostics = for_population(subjects, &estimation, options.seed, SIMULATIONS);
    estimation.warnings.extend(diagnostics.warnings.iter().cloned());
    Ok((estimation, diagnostics))
}
