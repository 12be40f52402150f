//! Command-line definitions and dispatch. One file per command; shared flag groups in `args`.

mod args;
mod check;
mod convert;
mod exposure;
mod fit;
mod merge;
mod nca;
mod plan;
mod plots;
mod population;
mod regimen_grid;
mod report;
mod signals;
mod simulate;
mod study;
mod sweep;
mod verify;
mod vpc;

use cistern::Error;
use clap::{Parser, Subcommand};
use std::process::ExitCode;

/// Dosing planner for drugs with one-compartment, first-order (linear) kinetics.
///
/// Values on the command line take a unit suffix (1g, 12h, 90min, 65ml/min, 0.5/h); a bare
/// number is in base units (mg, h, L, L/h, mg/L, 1/h). Output is a table on a terminal and CSV
/// when piped; choose with --format. Not clinical advice: dosing decisions belong to licensed
/// clinicians following local protocols.
#[derive(Parser, Debug)]
// The version with the build (build.rs), which sweep states record too.
#[command(
    name = "cistern",
    version = concat!(env!("CARGO_PKG_VERSION"), " (build: ", env!("CISTERN_BUILD"), ")"),
    propagate_version = true,
    max_term_width = 100
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    Simulate(simulate::SimulateArgs),
    Exposure(exposure::ExposureArgs),
    Fit(fit::FitArgs),
    Plan(plan::PlanArgs),
    Population(population::PopulationArgs),
    Report(report::ReportArgs),
    Check(check::CheckArgs),
    Convert(convert::ConvertArgs),
    Sweep(sweep::SweepArgs),
    Merge(merge::MergeArgs),
    Nca(nca::NcaArgs),
    Verify(verify::VerifyArgs),
    Vpc(vpc::VpcArgs),
}

/// Parse the command line, run the command, and turn the outcome into an exit code.
pub fn run() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            // Help and version go to stdout with code 0; usage errors to stderr with code 2.
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { 2 } else { 0 });
        }
    };
    signals::remove_unfinished_outputs_on_interrupt();
    let outcome = match cli.command {
        Command::Simulate(a) => simulate::run(a),
        Command::Exposure(a) => exposure::run(a),
        Command::Fit(a) => fit::run(a),
        Command::Plan(a) => plan::run(a),
        Command::Population(a) => population::run(a),
        Command::Report(a) => report::run(a),
        Command::Check(a) => check::run(a),
        Command::Convert(a) => convert::run(a),
        Command::Sweep(a) => sweep::run(a),
        Command::Merge(a) => merge::run(a),
        Command::Nca(a) => nca::run(a),
        Command::Verify(a) => verify::run(a),
        Command::Vpc(a) => vpc::run(a),
    };
    match outcome {
        Ok(()) | Err(Error::OutputClosed) => ExitCode::SUCCESS,
        Err(Error::Input(problems)) => {
            for p in &problems {
                eprintln!("error: {}", printable(&p.to_string()));
            }
            ExitCode::from(2)
        }
        Err(e) => {
            eprintln!("error: {}", printable(&e.to_string()));
            ExitCode::from(e.exit_code())
        }
    }
}

/// Text for the terminal with control characters (other than line ends) escaped: a value the
/// user gave (a subject asked for, a key's text) may hold an escape sequence, which must be
/// shown, not obeyed.
pub(crate) fn printable(text: &str) -> String {
    text.chars()
        .map(|c| if c.is_control() && c != '\n' { c.escape_default().to_string() } else { c.to_string() })
        .collect()
}
