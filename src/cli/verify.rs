//! `cistern verify`: the installation check.

use super::args::OutputArgs;
use cistern::Error;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, fixed, full, io_failure, render_table,
    write_json,
};
use cistern::verify::{BOURNE_NOTES, Outcome, Tolerance, run_all};
use clap::Args;
use serde::Serialize;

/// Run the built-in check cases (published worked examples) through this copy's own code.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  cistern verify
  cistern verify --format json -o verify.json

Each case names its source, whether the expected value is printed there, derived from its
published formula or data, or common practice, and the tolerance it allows. Exit code 0 when
every case passes, 1 when any fails.")]
pub struct VerifyArgs {
    #[command(flatten)]
    output: OutputArgs,
}

/// The JSON output.
#[derive(Serialize)]
struct VerifyJson<'a> {
    version: &'a str,
    passed: usize,
    failed: usize,
    cases: &'a [Outcome],
    bourne_notes: &'a str,
}

fn result_label(o: &Outcome) -> &'static str {
    if o.passed { "pass" } else { "FAIL" }
}

/// The decimals a case's expected and computed values both print with: down to the first
/// significant decimal of the allowed difference, so that the two read at the same precision,
/// the tolerance's.
fn decimals(o: &Outcome) -> usize {
    let allowed = match o.tolerance {
        Tolerance::Absolute(t) => t,
        Tolerance::Relative(t) => t * o.expected.abs(),
    };
    if allowed > 0.0 && allowed.is_finite() {
        (-allowed.log10().floor() as i32).clamp(0, 12) as usize
    } else {
        6
    }
}

fn tolerance_parts(t: Tolerance) -> (&'static str, f64) {
    match t {
        Tolerance::Absolute(x) => ("absolute", x),
        Tolerance::Relative(x) => ("relative", x),
    }
}

/// Run the command.
pub fn run(args: VerifyArgs) -> Result<(), Error> {
    let mut sink = args.output.sink(&mut RunFiles::default())?;
    let outcomes = run_all();
    let passed = outcomes.iter().filter(|o| o.passed).count();
    let failed = outcomes.len() - passed;
    let version = env!("CARGO_PKG_VERSION");
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => {
            let doc = VerifyJson { version, passed, failed, cases: &outcomes, bourne_notes: BOURNE_NOTES };
            write_json(out, &doc).map_err(io_failure)?;
        }
        Format::Csv => {
            let mut w = CsvWriter::new(&mut *out);
            let header = [
                "case",
                "unit",
                "source",
                "kind",
                "expected",
                "computed",
                "tolerance",
                "tolerance_type",
                "passed",
                "error",
            ];
            w.row(header).map_err(io_failure)?;
            for o in &outcomes {
                let (kind, tol) = tolerance_parts(o.tolerance);
                w.row([
                    o.name,
                    o.unit,
                    o.source,
                    o.kind.label(),
                    &full(o.expected),
                    &o.computed.map(full).unwrap_or_default(),
                    &full(tol),
                    kind,
                    if o.passed { "true" } else { "false" },
                    o.error.as_deref().unwrap_or(""),
                ])
                .map_err(io_failure)?;
            }
            w.finish().map_err(io_failure)?;
        }
        Format::Table => {
            let rows: Vec<Vec<String>> = outcomes
                .iter()
                .map(|o| {
                    let d = decimals(o);
                    vec![
                        result_label(o).to_string(),
                        o.name.to_string(),
                        fixed(o.expected, d),
                        o.computed.map_or_else(|| "error".to_string(), |c| fixed(c, d)),
                        o.tolerance.label(),
                        o.unit.to_string(),
                        o.kind.label().to_string(),
                        o.source.to_string(),
                    ]
                })
                .collect();
            let columns = [
                Column::text("result"),
                Column::text("case").wrapped(),
                Column::number("expected"),
                Column::number("computed"),
                Column::text("tolerance").optional(2),
                Column::text("unit"),
                Column::text("kind").optional(3),
                Column::text("source").optional(4).wrapped(),
            ];
            let width = args.output.table_width();
            let mut text = format!("cistern {version}: installation check, {} cases\n", outcomes.len());
            text += &render_table(&columns, &rows, width);
            for o in outcomes.iter().filter(|o| o.error.is_some()) {
                text += &format!("{}: {}\n", o.name, o.error.as_deref().unwrap_or_default());
            }
            text += &format!(
                "\nExpected and computed values print with the same decimals, enough to show the tolerance.\n\
                 {passed} passed, {failed} failed.\n\"Bourne notes\" = {BOURNE_NOTES}.\n{CAUTION}\n"
            );
            write!(out, "{}", fit_to_width(&text, width)).map_err(io_failure)?;
        }
    }
    args.output.caution_for_csv(format);
    sink.finish()?;
    if failed > 0 {
        return Err(Error::Failure(format!("{failed} of {} check cases failed", outcomes.len())));
    }
    Ok(())
}
