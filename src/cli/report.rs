//! `cistern report --case CASE`: fit, plan (and, if the case asks, sweep), then write the regimen
//! report as a PDF.

use super::args::{Notify, whole};
use cistern::io::output::{CAUTION, RunFiles, io_failure};
use cistern::report::provenance::iso_utc;
use cistern::workflow::population;
use cistern::workflow::report::{Provenance, report};
use cistern::{Error, InputError, Origin, case};
use clap::Args;
use std::path::Path;
use std::time::{SystemTime, UNIX_EPOCH};

/// Write the regimen report of a case as a PDF, or the population report of a case with a
/// [population] table.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern report --case demo-regimens/p01.toml           # writes ./p01-report.pdf
  cistern report --case demo-regimens/p01.toml -o p01.pdf --svg p01-curve.svg
  cistern report demo-regimens/p01.toml                  # the case may also come first

The case file names the model, doses, levels and covariates files (paths relative to the case
file), the targets, limits and candidate regimens, the seed and the report options; flags
given here override it. A case with a [population] table (method, nodes) names a population
analysis instead: the model is the start model, and the report describes the estimated
population model, its diagnostics and their plots. Every page carries the caution that the report is not clinical advice.
Set SOURCE_DATE_EPOCH to fix the creation time (reproducible reports).")]
pub struct ReportArgs {
    /// The case file (TOML), as with --case
    #[arg(value_name = "CASE", conflicts_with = "case")]
    case_file: Option<String>,
    /// The case file (TOML) naming the input files and settings; flags override it
    #[arg(long = "case", value_name = "FILE")]
    case: Option<String>,
    /// The PDF to write [default: <case name>-report.pdf in the current directory]
    #[arg(short = 'o', long = "output", value_name = "FILE.pdf")]
    output: Option<String>,
    /// Also write the concentration plot as SVG (a population report: every diagnostic plot)
    #[arg(long, value_name = "FILE.svg")]
    svg: Option<String>,
    /// The subject to report on (overrides the case)
    #[arg(long, value_name = "ID")]
    subject: Option<String>,
    /// Seed of the random draws (overrides the case) [default: 1]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u64>)]
    seed: Option<u64>,
    /// Posterior draws (overrides the case) [default: 2000]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u32>)]
    draws: Option<u32>,
    /// Time of the new regimen's first dose (overrides the case)
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    start: Option<String>,
    #[command(flatten)]
    notify: Notify,
}

/// The creation time to print: `SOURCE_DATE_EPOCH` (seconds since 1970-01-01 UTC, the
/// reproducible-builds convention) when set, else the clock.
fn created_iso() -> Result<String, Error> {
    let seconds = match std::env::var("SOURCE_DATE_EPOCH") {
        Ok(text) => text.trim().parse::<i64>().map_err(|_| {
            Error::Usage(format!(
                "SOURCE_DATE_EPOCH: expected whole seconds since 1970-01-01 UTC, found '{text}'"
            ))
        })?,
        Err(_) => SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64),
    };
    iso_utc(seconds).map_err(|m| Error::Usage(format!("SOURCE_DATE_EPOCH: {m}")))
}

/// Run the command.
pub fn run(args: ReportArgs) -> Result<(), Error> {
    let Some(case_path) = args.case.as_deref().or(args.case_file.as_deref()) else {
        return Err(Error::Usage("give the case file: cistern report --case CASE.toml".into()));
    };
    let mut spec = case::read(case_path)?;
    if spec.population.is_some() {
        // A population report describes the whole study: one subject's settings do not apply.
        let given = [
            ("--subject", args.subject.is_some()),
            ("--draws", args.draws.is_some()),
            ("--start", args.start.is_some()),
        ];
        if let Some((flag, _)) = given.iter().find(|(_, g)| *g) {
            return Err(InputError::flag(
                *flag,
                "does not apply to a population report (the case has [population])",
            )
            .into());
        }
    }
    spec.subject.set("--subject", args.subject.clone());
    spec.seed.set("--seed", args.seed);
    spec.draws.set("--draws", args.draws);
    spec.start.set("--start", args.start.clone());
    let provenance = Provenance {
        command_line: std::env::args()
            .map(|a| if a.contains(' ') { format!("'{a}'") } else { a })
            .collect::<Vec<_>>()
            .join(" "),
        created_iso: created_iso()?,
    };
    let output = args.output.clone().unwrap_or_else(|| {
        let stem =
            Path::new(case_path).file_stem().map_or("case".into(), |s| s.to_string_lossy().into_owned());
        format!("{stem}-report.pdf")
    });
    // Both outputs are opened before the work, so a bad path fails with nothing computed.
    let mut files = RunFiles::new(spec.files());
    let mut pdf_sink = files.open(Origin::Flag("-o".into()), &output)?;
    let svg_sink = files.open_flag("--svg", args.svg.as_deref())?;
    // The SVG is drawn only when asked for.
    let wanted = svg_sink.is_some();
    let (bytes, svg, notices) = if spec.population.is_some() {
        let made = population::report(&spec, provenance)?;
        (made.pdf()?, wanted.then(|| made.svg()), made.notices)
    } else {
        let made = report(&spec, provenance)?;
        (made.pdf()?, wanted.then(|| made.svg()), made.notices)
    };
    pdf_sink.writer().write_all(&bytes).map_err(io_failure)?;
    if let (Some(mut sink), Some(svg)) = (svg_sink, svg) {
        sink.writer().write_all(svg.as_bytes()).map_err(io_failure)?;
        sink.finish()?;
    }
    pdf_sink.finish()?;
    args.notify.notices(&notices);
    args.notify.note(&format!("wrote {output}"));
    eprintln!("caution: {CAUTION}");
    Ok(())
}
