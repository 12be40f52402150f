//! The regimen report of a spec: fit the subject, plan, sweep when asked, and lay the whole
//! analysis out as a document, ready to render as PDF (feature `pdf`) or its plots as SVG.

use super::plan::{NextLevel, PlanSubject, plan, plan_settings};
use super::study::{Required, Study};
use crate::error::{Error, Problems, Result};
use crate::io::digest::sha256_hex;
use crate::io::input;
use crate::io::output::CAUTION;
use crate::io::table::Notices;
use crate::plan::Course;
use crate::plan::session::Outcome;
use crate::report::content::{Analysis, Stamp, build, concentration_plots};
use crate::report::layout::{Document, PlotSpec};
use crate::seeds::Seeds;
use crate::spec::{DEFAULT_DRAWS, Spec};

/// Where a report came from, supplied by the caller: the command line that asked for it and
/// the creation time to print (the library reads neither the process's arguments nor the clock).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Provenance {
    /// The command line (or a description of the call) that produced the report.
    pub command_line: String,
    /// Creation time, ISO 8601 UTC.
    pub created_iso: String,
}

/// A report, laid out.
#[derive(Debug, Clone)]
pub struct Report {
    /// The pages' content.
    pub document: Document,
    /// The concentration plots (also on the document's pages).
    pub plots: Vec<PlotSpec>,
    /// What to tell the user: notes (where the new regimen starts, how candidates not given
    /// were derived) and the warnings reading the study drew (implausible values).
    pub notices: Notices,
}

impl Report {
    /// The report as PDF bytes.
    #[cfg(feature = "pdf")]
    pub fn pdf(&self) -> Result<Vec<u8>> {
        crate::report::pdf::render_pdf(&self.document).map_err(Error::Failure)
    }

    /// The concentration plots as one SVG document, with the caution.
    pub fn svg(&self) -> String {
        crate::report::svg::render_svg(&self.plots, CAUTION)
    }
}

impl Provenance {
    /// The stamp of a report of `spec` made with `seed`: the SHA-256 of every input file (the
    /// case file first), the seed, the command line, the version, the time and the caution.
    pub(crate) fn stamp(self, spec: &Spec, seed: u64) -> Result<Stamp> {
        let digests = spec
            .files()
            .into_iter()
            .map(|f| Ok((f.to_string_lossy().into_owned(), sha256_hex(&input::read(&f)?))))
            .collect::<Result<_>>()?;
        Ok(Stamp {
            digests,
            seed,
            command_line: self.command_line,
            version: env!("CARGO_PKG_VERSION").to_string(),
            created_iso: self.created_iso,
            caution: CAUTION.to_string(),
        })
    }
}

/// Fit the spec's subject against its model (or, without levels, draw from the model's prior
/// for its covariates), plan over the grid, sweep the grid over a
/// virtual population when the spec asks, and lay out the report.
///
/// ```
/// use cistern::workflow::report::{Provenance, report};
///
/// let mut spec = cistern::case::read("demo-regimens/p01.toml")?;
/// spec.draws.value = Some(200);
/// spec.sweep = None;
/// let when = Provenance { command_line: "my-tool p01".into(), created_iso: "2025-03-01T14:05:09Z".into() };
/// let report = report(&spec, when)?;
/// assert!(report.document.title.contains("P01"));
/// assert!(report.svg().starts_with("<svg"));
/// #[cfg(feature = "pdf")]
/// assert!(report.pdf()?.starts_with(b"%PDF"));
/// # Ok::<(), cistern::Error>(())
/// ```
pub fn report(spec: &Spec, provenance: Provenance) -> Result<Report> {
    let mut problems = Problems::new();
    let study = problems.take_all(Study::load(&spec.inputs, Required { model: true, levels: false }));
    // A bad --draws is reported with the other settings below.
    let draws = spec.draws().unwrap_or(DEFAULT_DRAWS as usize);
    let seeds = Seeds(spec.seed());
    let subject = study.as_ref().and_then(|study| {
        let model = study.model.as_ref()?;
        let data = problems.take(study.subject(&spec.subject))?;
        problems.take_all(PlanSubject::of(data, model, seeds, draws)).map(|planned| (data, planned))
    });
    // Candidates not given are derived for the subject's point estimate, as `plan` does.
    let settings = problems.take_all(plan_settings(spec, subject.as_ref().map(|(_, (s, _))| s)));
    let (settings, (data, (subject, fit))) = problems.finish_with(settings.zip(subject))?;
    let (Some(grid), Some(model)) = (&settings.grid, study.as_ref().and_then(|s| s.model.as_ref())) else {
        return Err(Error::Usage("the report needs a population model and a candidate grid".into()));
    };
    // The plan and the sweep share nothing: each runs while the other waits on a thread. The
    // plan's failure is reported first, as when the sweep came after it.
    let (planned, sweep) = rayon::join(
        || plan(&subject, grid, settings.start_h, NextLevel::default(), seeds),
        || match (&spec.sweep, settings.sweep_subjects) {
            (Some(sweep), Some(subjects)) => {
                super::sweep::summary(model, &sweep.covariates, grid, settings.seed, subjects).map(Some)
            }
            _ => Ok(None),
        },
    );
    let Outcome { start_h, plan: planned, advice, notes: plan_notes, warnings: plan_warnings } = planned?;
    let sweep = sweep?;
    let notes = grid.notes.iter().map(|n| format!("candidates: {n}")).chain(plan_notes).collect();
    let read = study.as_ref().map(|s| s.notices.warnings.clone()).unwrap_or_default();
    let warnings = read.into_iter().chain(grid.warnings.iter().cloned()).chain(plan_warnings).collect();
    // The subject's non-compartmental summary, by the defaults of `cistern nca`.
    let nca = crate::nca::analyse_subject(data, &crate::nca::NcaOptions::default());
    let analysis = Analysis {
        title: spec
            .report
            .title
            .clone()
            .unwrap_or_else(|| format!("Regimen report: {}", data.id.as_deref().unwrap_or("subject"))),
        author: spec.report.author.clone(),
        note: spec.report.note.clone(),
        model,
        covariates: &data.covariates,
        doses: &data.doses,
        levels: &data.levels,
        nca: &nca,
        subject: data.id.as_deref(),
        fit: fit.as_ref(),
        point: subject.posterior.point,
        draws: &subject.posterior.draws,
        targets: &grid.targets,
        limits: &grid.limits,
        candidates_derived: &grid.notes,
        course: Course {
            history: &data.doses,
            start_h,
            therapy_start_h: data.doses.first().map_or(start_h, |d| d.time_h),
        },
        plan: &planned,
        advice: advice.as_ref(),
        sweep: sweep.as_ref(),
        stamp: provenance.stamp(spec, settings.seed)?,
    };
    let plots = concentration_plots(&analysis);
    let document = build(&analysis, &plots);
    Ok(Report { document, plots, notices: Notices { notes, warnings } })
}
