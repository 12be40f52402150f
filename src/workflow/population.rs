//! A population analysis of a study: the estimation, its diagnostics and each subject's
//! individual fit against the estimated model, shared by `cistern population` and the
//! population report.

use super::report::Provenance;
use super::study::{Required, Study};
use crate::diagnostics::vpc::plot::figure as vpc_figure;
use crate::diagnostics::vpc::{BinBy, Bins, REPLICATES, VpcOptions, vpc};
use crate::diagnostics::{Diagnostics, SIMULATIONS, for_population, plots};
use crate::error::{Error, Problems, Result};
use crate::fit::{FitOptions, FitResult, Intervals, SubjectData, fit_all};
use crate::io::output::CAUTION;
use crate::io::table::Notices;
use crate::population::quadrature::MAX_NODES;
use crate::population::summary::Estimation;
use crate::population::{Method, Options, estimate};
use crate::report::layout::Document;
use crate::report::plot::Figure;
use crate::report::population::{PopulationAnalysis, build};
use crate::spec::{PopulationSpec, Spec};

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
) -> Result<(Estimation, Diagnostics)> {
    let mut estimation = estimate(subjects, model, options)?;
    let diagnostics = for_population(subjects, &estimation, options.seed, SIMULATIONS);
    estimation.warnings.extend(diagnostics.warnings.iter().cloned());
    Ok((estimation, diagnostics))
}

/// The population report, laid out.
#[derive(Debug, Clone)]
pub struct PopulationReport {
    /// The pages' content.
    pub document: Document,
    /// The diagnostic figures (also on the document's pages).
    pub figures: Vec<Figure>,
    /// The warnings reading the study drew (implausible values) and the estimation's notes.
    pub notices: Notices,
}

impl PopulationReport {
    /// The report as PDF bytes.
    #[cfg(feature = "pdf")]
    pub fn pdf(&self) -> Result<Vec<u8>> {
        crate::report::pdf::render_pdf(&self.document).map_err(Error::Failure)
    }

    /// The figures as one SVG document, with the caution.
    pub fn svg(&self) -> String {
        let scenes: Vec<_> = self.figures.iter().map(Figure::scene).collect();
        crate::report::svg::render_scenes(&scenes, CAUTION)
    }
}

/// The options of a population analysis a spec states (the case's `[population]` table), each
/// problem located at its key.
fn options(stated: &PopulationSpec, seed: u64) -> std::result::Result<Options, Vec<crate::InputError>> {
    let mut problems = Vec::new();
    let method = match &stated.method.value {
        Some(text) => crate::choice::parse::<Method>(text)
            .map_err(|e| problems.push(stated.method.problem(e.message)))
            .unwrap_or(Method::Quadrature),
        None => Method::Quadrature,
    };
    let nodes = stated.nodes.value.and_then(|n| {
        if (1..=MAX_NODES as u64).contains(&n) {
            Some(n as usize)
        } else {
            problems.push(stated.nodes.problem(format!("expected 1 to {MAX_NODES} nodes, found {n}")));
            None
        }
    });
    let options = Options { method, nodes, seed, ..Options::default() };
    if problems.is_empty() { Ok(options) } else { Err(problems) }
}

/// Estimate the population model of the spec's study from its start model, with the
/// diagnostics and their plots, and lay out the population report. The spec must state a
/// population analysis ([`Spec::population`]).
pub fn report(spec: &Spec, provenance: Provenance) -> Result<PopulationReport> {
    let Some(stated) = &spec.population else {
        return Err(Error::Usage("the case states no population analysis ([population])".into()));
    };
    let mut problems = Problems::new();
    let study = problems.take_all(Study::load(&spec.inputs, Required { model: true, levels: true }));
    let options = problems.take_all(options(stated, spec.seed()).map_err(Error::from));
    let (study, options) = problems.finish_with(study.zip(options))?;
    let Some(model) = &study.model else {
        return Err(Error::Usage("a population analysis needs a start model (inputs.model)".into()));
    };
    let subjects = &study.subjects;
    let (estimation, diagnostics) = estimate_and_diagnose(subjects, model, &options)?;
    let fits = individual_fits(subjects, &estimation, options.seed);
    // The visual predictive check of the estimated model follows the diagnostic plots: the
    // default of `cistern vpc` (500 replicates, time after dose, bins by sampling clusters).
    let vpc_options = VpcOptions {
        replicates: REPLICATES,
        seed: options.seed,
        bin_by: BinBy::TimeAfterDose,
        bins: Bins::Auto,
        prediction_corrected: false,
    };
    let check = vpc(subjects, &estimation.model, &vpc_options)?;
    let mut figures = plots::figures(&diagnostics.rows, subjects, &fits);
    figures.push(vpc_figure(&check));
    let analysis = PopulationAnalysis {
        title: spec.report.title.clone().unwrap_or_else(|| {
            format!("Population report: {}", estimation.model.drug.as_deref().unwrap_or("unnamed drug"))
        }),
        author: spec.report.author.clone(),
        note: spec.report.note.clone(),
        subjects,
        estimation: &estimation,
        figures: &figures,
        stamp: provenance.stamp(spec, options.seed)?,
    };
    let document = build(&analysis);
    let notices = Notices { notes: estimation.notes.clone(), warnings: study.notices.warnings.clone() };
    Ok(PopulationReport { document, figures, notices })
}
