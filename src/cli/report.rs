//! `cistern report CASE`: fit, plan (and, if the case asks, sweep), then write the regimen
//! report as a PDF.

use super::args::{Problems, flag_value};
use super::regimen_grid::GridArgs;
use super::study::{StudyArgs, planning_fit, seed_and_draws};
use cistern::case::{Case, SweepRequest};
use cistern::covariates::parse_covariates;
use cistern::dosing::Regimen;
use cistern::fit::mix_seed;
use cistern::io::digest::sha256_hex;
use cistern::io::output::readable;
use cistern::io::output::{CAUTION, Sink};
use cistern::io::table::Table;
use cistern::model::PopulationModel;
use cistern::plan::session::{Posterior, Settings, plan_subject};
use cistern::plan::targets::{Limits, Target};
use cistern::report::content::SweepRows;
use cistern::report::content::{Analysis, build, concentration_plots};
use cistern::report::provenance::{iso_utc, now_epoch_seconds};
use cistern::report::{pdf, svg};
use cistern::sweep::Sweep;
use cistern::sweep::population::{CovariateSource, Population};
use cistern::sweep::state::{Setup, Shard, SweepState};
use cistern::sweep::summary::{Summary, SummaryRow};
use cistern::units::Kind;
use cistern::{Error, InputError};
use clap::Args;
use std::path::Path;

/// Write the regimen report of a case as a PDF.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern report demo-regimens/p01.toml                  # writes ./p01-report.pdf
  cistern report demo-regimens/p01.toml -o p01.pdf --svg p01-curve.svg

The case file names the model, doses, levels and covariates files (paths relative to the case
file), the targets, limits and candidate regimens, the seed and the report options; flags
given here override it. Every page carries the caution that the report is not clinical advice.
Set SOURCE_DATE_EPOCH to fix the creation time (reproducible reports).")]
pub struct ReportArgs {
    /// The case file (TOML)
    #[arg(value_name = "CASE")]
    case: String,
    /// The PDF to write [default: <case name>-report.pdf in the current directory]
    #[arg(short = 'o', long = "output", value_name = "FILE.pdf")]
    output: Option<String>,
    /// Also write the concentration plot as SVG
    #[arg(long, value_name = "FILE.svg")]
    svg: Option<String>,
    /// The subject to report on (overrides the case)
    #[arg(long, value_name = "ID")]
    subject: Option<String>,
    /// Seed of the random draws (overrides the case) [default: 1]
    #[arg(long)]
    seed: Option<u64>,
    /// Posterior draws (overrides the case) [default: 2000]
    #[arg(long, value_parser = clap::value_parser!(u32).range(100..=100_000))]
    draws: Option<u32>,
    /// Time of the new regimen's first dose (overrides the case)
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    start: Option<String>,
    /// Print nothing but errors
    #[arg(short, long)]
    quiet: bool,
}

/// Sweep the case's candidates over a virtual population, for the report's sweep page.
fn sweep_rows(
    model: &PopulationModel,
    request: &SweepRequest,
    candidates: &[Regimen],
    targets: &[Target],
    limits: &Limits,
    seed: u64,
) -> Result<SweepRows, Error> {
    let source = match &request.covariates {
        Some(pool) => {
            let table = Table::read(&path_text(pool)).map_err(Error::Input)?;
            CovariateSource::Pool(parse_covariates(&table).map_err(Error::Input)?)
        }
        None => CovariateSource::None,
    };
    let population = Population::from_model(model.clone(), source).map_err(Error::Usage)?;
    let sweep = Sweep { population: &population, candidates, targets, limits, seed };
    sweep.check()?;
    let tallies = sweep.run(0..request.subjects, None, &mut |_| {})?;
    let setup = Setup::new(serde_json::Value::Null, seed, request.subjects, candidates, targets, limits);
    let summary = Summary::of(&SweepState::new(setup, Shard::WHOLE, tallies));
    let mut rows: Vec<&SummaryRow> = summary.regimens.iter().collect();
    rows.sort_by(|a, b| b.pta.total_cmp(&a.pta).then(a.daily_mg.total_cmp(&b.daily_mg)));
    let cell = |x: Option<f64>| x.map(|v| readable(v, 3)).unwrap_or_default();
    let label = |r: &SummaryRow| {
        let broken =
            if r.dose_limits_broken.is_empty() && r.exposure_limits_broken.is_empty() { "" } else { " *" };
        format!("{}{broken}", r.regimen.describe())
    };
    Ok(SweepRows {
        subjects: request.subjects,
        headers: ["regimen", "PTA %", "trough p05", "p50", "p95", "peak p50", "AUC24 p05", "p50", "p95"]
            .map(String::from)
            .to_vec(),
        rows: rows
            .into_iter()
            .take(20)
            .map(|r| {
                (
                    label(r),
                    r.pta,
                    vec![
                        label(r),
                        format!("{:.1}", 100.0 * r.pta),
                        cell(r.trough_mg_l.p05),
                        cell(r.trough_mg_l.p50),
                        cell(r.trough_mg_l.p95),
                        cell(r.peak_mg_l.p50),
                        cell(r.auc24_mg_h_l.p05),
                        cell(r.auc24_mg_h_l.p50),
                        cell(r.auc24_mg_h_l.p95),
                    ],
                )
            })
            .collect(),
    })
}

fn path_text(p: &Path) -> String {
    p.to_string_lossy().into_owned()
}

/// Run the command.
pub fn run(args: ReportArgs) -> Result<(), Error> {
    let case = Case::read(&args.case).map_err(Error::Input)?;
    let study = StudyArgs {
        case: None,
        model: case.model.as_deref().map(path_text),
        doses: Some(path_text(&case.doses)),
        levels: case.levels.as_deref().map(path_text),
        covariates: case.covariates.as_deref().map(path_text),
        covariate: Vec::new(),
    };
    let mut problems = Problems::new();
    if case.model.is_none() {
        problems.push(
            InputError::new(&args.case, "the case names no population model: add inputs.model")
                .in_column("inputs.model"),
        );
    }
    if case.levels.is_none() {
        problems.push(
            InputError::new(&args.case, "the case names no levels file: add inputs.levels")
                .in_column("inputs.levels"),
        );
    }
    // Without levels there is nothing to load (and that is already reported).
    let loaded = if case.levels.is_some() { study.load(&mut problems) } else { None };
    let start = args
        .start
        .as_ref()
        .or(case.start.as_ref())
        .and_then(|s| problems.take(flag_value("--start", Kind::Time, s)));
    problems.finish()?;
    let Some(loaded) = loaded else { return Err(Error::Usage("the case could not be read".into())) };
    let Some(model) = loaded.model.as_ref() else {
        return Err(Error::Usage("the case names no model".into()));
    };
    let wanted = args.subject.as_deref().or(case.subject.as_deref());
    let subject = match wanted {
        Some(w) => loaded.subjects.iter().find(|s| s.id.as_deref() == Some(w)).ok_or_else(|| {
            InputError::new(&args.case, format!("no subject '{w}' in the levels file"))
                .in_column("case.subject")
        })?,
        None if loaded.subjects.len() == 1 => &loaded.subjects[0],
        None => {
            return Err(InputError::new(
                &args.case,
                format!(
                    "the data hold {} subjects: name one with case.subject or --subject",
                    loaded.subjects.len()
                ),
            )
            .into());
        }
    };
    let (seed, draws) = seed_and_draws(args.seed, args.draws, Some(&case));
    // The report has no grid flags: all of it comes from the case.
    let (candidates, targets, limits) = GridArgs::default().grid_or_case(Some(&case))?;
    let fit = planning_fit(subject, model, seed, draws as usize)?;
    let posterior = Posterior { point: fit.parameters, draws: fit.draws.clone(), residual: fit.residual };
    let settings = Settings {
        candidates: &candidates,
        targets: &targets,
        limits,
        start_h: start,
        advise_on: None,
        advise_intervals: 2,
        seed: mix_seed(seed, 1),
    };
    let outcome = plan_subject(&subject.doses, &posterior, &settings).map_err(|e| Error::Usage(e.message))?;
    let sweep = match &case.sweep {
        Some(request) => Some(sweep_rows(model, request, &candidates, &targets, &limits, seed)?),
        None => None,
    };
    let mut digests = Vec::new();
    for f in case.files() {
        let bytes =
            std::fs::read(f).map_err(|e| InputError::new(path_text(f), format!("cannot read: {e}")))?;
        digests.push((path_text(f), sha256_hex(&bytes)));
    }
    let created = iso_utc(now_epoch_seconds()).map_err(Error::Failure)?;
    let analysis = Analysis {
        title: case
            .title
            .clone()
            .unwrap_or_else(|| format!("Regimen report: {}", subject.id.as_deref().unwrap_or("subject"))),
        author: case.author.clone(),
        note: case.note.clone(),
        model,
        covariates: &subject.covariates,
        doses: &subject.doses,
        levels: &subject.levels,
        fit: &fit,
        draws: &fit.draws,
        targets: &targets,
        limits: &limits,
        course: cistern::plan::Course {
            history: &subject.doses,
            start_h: outcome.start_h,
            therapy_start_h: subject.doses.first().map_or(outcome.start_h, |d| d.time_h),
        },
        plan: &outcome.plan,
        advice: outcome.advice.as_ref(),
        sweep: sweep.as_ref(),
        digests,
        seed,
        command_line: std::env::args()
            .map(|a| if a.contains(' ') { format!("'{a}'") } else { a })
            .collect::<Vec<_>>()
            .join(" "),
        version: env!("CARGO_PKG_VERSION").to_string(),
        created_iso: created,
        caution: CAUTION.to_string(),
    };
    let plots = concentration_plots(&analysis);
    let document = build(&analysis, &plots);
    let bytes = pdf::render_pdf(&document).map_err(Error::Failure)?;
    let output = args.output.clone().unwrap_or_else(|| {
        let stem =
            Path::new(&args.case).file_stem().map_or("case".into(), |s| s.to_string_lossy().into_owned());
        format!("{stem}-report.pdf")
    });
    let inputs: Vec<String> = case.files().iter().map(|p| path_text(p)).collect();
    let input_refs: Vec<&str> = inputs.iter().map(String::as_str).collect();
    // Open both outputs before writing either, so a bad path fails with nothing written.
    let mut pdf_sink = Sink::open(Some(&output), &input_refs)?;
    let svg_sink = match &args.svg {
        Some(path) => Some(Sink::open(Some(path), &input_refs)?),
        None => None,
    };
    pdf_sink.writer().write_all(&bytes).map_err(cistern::io::output::io_failure)?;
    if let Some(mut sink) = svg_sink {
        sink.writer()
            .write_all(svg::render_svg(&plots, CAUTION).as_bytes())
            .map_err(cistern::io::output::io_failure)?;
        sink.finish()?;
    }
    pdf_sink.finish()?;
    if !args.quiet {
        for n in &outcome.notes {
            eprintln!("note: {n}");
        }
        eprintln!("wrote {output}");
        eprintln!("caution: {CAUTION}");
    }
    Ok(())
}
