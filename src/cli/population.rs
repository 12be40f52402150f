//! `cistern population`: estimate the population model from a study.

use super::args::{OutputArgs, choice, warn, whole};
use super::study::StudyArgs;
use cistern::Error;
use cistern::diagnostics::Diagnostics;
use cistern::diagnostics::plots::figures;
use cistern::error::Problems;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, io_failure, readable, render_table,
    write_json,
};
use cistern::population::summary::{Estimation, describe};
use cistern::population::{Method, NODE_MEMORY_BYTES, Options, quadrature::MAX_NODES};
use cistern::spec::Needs;
use cistern::workflow::population::{estimate_and_diagnose, individual_fits};
use cistern::workflow::{Required, Study};
use clap::Args;
use std::io::Write;

/// Estimate the population model (typical values, covariate effects, variability, residual
/// error) from a whole study, with an exact likelihood.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # estimate from a starting model, write the fitted model and every subject's estimates
  cistern population --model start.toml --doses doses.csv --levels levels.csv \\
      --covariates covariates.csv --model-out fitted.toml --subjects-out subjects.csv

  # the objective at the model's own values (for likelihood profiles and ratio tests)
  cistern population --model fitted.toml --doses doses.csv --levels levels.csv --evaluate

The start model fixes the structure (which covariate effects, which correlations, which
residual terms) and the initial values; every value is estimated except F, the lag time, a
variability or residual term given as 0, and what [estimation] hold lists. The fitted model
is a model file that fit, plan, sweep and report read unchanged.")]
pub struct PopulationArgs {
    #[command(flatten)]
    study: StudyArgs,
    /// How each subject's likelihood is integrated over its random effects
    #[arg(long, value_parser = choice::<Method>(), default_value = "quadrature")]
    method: Method,
    /// Gauss–Hermite nodes per random effect (quadrature), 1 to 40 [default: chosen per
    /// subject and principal axis of its posterior at the estimate, from 7, 10, 14, 20, 28, 40,
    /// until moving any axis a rung up changes -2LL by at most 1e-7 in all]
    #[arg(long, value_parser = clap::value_parser!(u32).range(1..=MAX_NODES as i64))]
    nodes: Option<u32>,
    /// The most memory the quadrature nodes' predictions may hold between adaptations, in
    /// MiB, shared by the subjects; a subject needing more than its share has its nodes placed
    /// again at every evaluation (the same results, slower)
    #[arg(long, value_name = "MIB", default_value_t = (NODE_MEMORY_BYTES >> 20) as u32,
          value_parser = clap::value_parser!(u32).range(0..=1 << 20))]
    node_memory_mib: u32,
    /// Evaluate the objective and the individual estimates at the model's values, without estimating
    #[arg(long)]
    evaluate: bool,
    /// Bootstrap replicates (subjects resampled with replacement), for percentile intervals
    #[arg(long, value_name = "N", default_value_t = 0, value_parser = clap::value_parser!(u32).range(0..=10_000))]
    bootstrap: u32,
    /// Seed of the bootstrap's resampling [default: the case's, else 1]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u64>)]
    seed: Option<u64>,
    /// Write the fitted model to FILE (TOML, the format `--model` reads)
    #[arg(long, value_name = "FILE")]
    model_out: Option<String>,
    /// Write every subject's individual estimates to FILE (CSV, the columns of `fit`'s CSV)
    #[arg(long, value_name = "FILE")]
    subjects_out: Option<String>,
    /// Write every level's diagnostics (PRED, IPRED, IWRES, CWRES, NPDE) to FILE (CSV, the
    /// columns of `fit --diagnostics-out`)
    #[arg(long, value_name = "FILE")]
    diagnostics_out: Option<String>,
    /// Also write the diagnostic plots as SVG into DIR (which must exist), as `fit
    /// --plots-dir` does; the individual fits and random effects are those of --subjects-out
    #[arg(long, value_name = "DIR")]
    plots_dir: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// The JSON output: the estimation and the diagnostics' summary.
#[derive(serde::Serialize)]
struct PopulationJson<'a> {
    #[serde(flatten)]
    estimation: &'a Estimation,
    diagnostics: &'a Diagnostics,
}

/// Run the command.
pub fn run(args: PopulationArgs) -> Result<(), Error> {
    let mut spec = args.study.spec()?;
    spec.seed.set("--seed", args.seed);
    let mut problems = Problems::new();
    let settings = problems.take_all(spec.resolve(Needs::default()));
    let study = problems.take_all(Study::load(&spec.inputs, Required { model: true, levels: true }));
    let (Study { model, subjects, notices, .. }, settings) = problems.finish_with(study.zip(settings))?;
    args.output.notify.notices(&notices);
    let model =
        model.ok_or_else(|| Error::Usage("population estimation needs a start model (--model)".into()))?;
    let mut files = RunFiles::new(spec.files());
    let mut sink = args.output.sink(&mut files)?;
    let mut model_sink = files.open_flag("--model-out", args.model_out.as_deref())?;
    let mut subjects_sink = files.open_flag("--subjects-out", args.subjects_out.as_deref())?;
    let mut diagnostics_sink = files.open_flag("--diagnostics-out", args.diagnostics_out.as_deref())?;
    let plots_dir = super::plots::PlotsDir::open(&mut files, args.plots_dir.as_deref())?;
    let options = Options {
        method: args.method,
        nodes: args.nodes.map(|n| n as usize),
        evaluate: args.evaluate,
        bootstrap: args.bootstrap as usize,
        seed: settings.seed,
        node_memory_bytes: (args.node_memory_mib as usize).saturating_mul(1 << 20),
    };
    let (result, diagnostics) = estimate_and_diagnose(&subjects, &model, &options)?;
    // The individual fits cost a MAP fit per subject: only when written or drawn.
    let fits = if subjects_sink.is_some() || plots_dir.is_some() {
        individual_fits(&subjects, &result, settings.seed)
    } else {
        Vec::new()
    };
    for note in &result.notes {
        args.output.note(note);
    }
    let out = sink.writer();
    match args.output.format() {
        Format::Json => write_json(out, &PopulationJson { estimation: &result, diagnostics: &diagnostics })
            .map_err(io_failure)?,
        Format::Csv => {
            write_csv(out, &result).map_err(io_failure)?;
            eprintln!("caution: {CAUTION}");
        }
        Format::Table => {
            let width = args.output.table_width();
            write!(out, "{}", fit_to_width(&table(&result, width), width)).map_err(io_failure)?;
        }
    }
    for w in &result.warnings {
        warn(&w.message);
    }
    if let Some(s) = model_sink.as_mut() {
        let header = format!(
            "# Estimated by cistern population ({}, {} subjects, -2LL {}); a model calculation, not clinical advice.\n",
            result.method,
            result.objective.n_subjects,
            readable(result.objective.minus2ll, 10)
        );
        write!(s.writer(), "{header}{}", result.model.to_toml()).map_err(io_failure)?;
    }
    if let Some(s) = subjects_sink.as_mut() {
        super::fit::write_csv(s.writer(), &fits).map_err(io_failure)?;
        if args.output.format() != Format::Csv {
            eprintln!("caution: {CAUTION}");
        }
    }
    if let Some(s) = diagnostics_sink.as_mut() {
        super::fit::write_diagnostics(s.writer(), &diagnostics.rows).map_err(io_failure)?;
        if args.output.format() != Format::Csv && subjects_sink.is_none() {
            eprintln!("caution: {CAUTION}");
        }
    }
    sink.finish()?;
    if let Some(s) = diagnostics_sink {
        s.finish()?;
    }
    if let Some(s) = model_sink {
        s.finish()?;
    }
    if let Some(s) = subjects_sink {
        s.finish()?;
    }
    if let Some(dir) = plots_dir {
        dir.write(&figures(&diagnostics.rows, &subjects, &fits), &args.output.notify)?;
    }
    Ok(())
}

fn write_csv(out: &mut dyn Write, r: &Estimation) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    w.row([
        "object",
        "key",
        "value",
        "se",
        "rse_pct",
        "ci95_lo",
        "ci95_hi",
        "held",
        "bootstrap_ci95_lo",
        "bootstrap_ci95_hi",
    ])?;
    let optional = |w: &mut CsvWriter<&mut dyn Write>, x: Option<f64>| match x {
        Some(x) => w.number(x),
        None => w.text(""),
    };
    for (object, key, e) in r.rows() {
        w.text(object)?;
        w.text(key)?;
        w.number(e.estimate.value)?;
        optional(&mut w, e.estimate.se)?;
        optional(&mut w, e.rse_pct)?;
        optional(&mut w, e.estimate.ci95.map(|c| c[0]))?;
        optional(&mut w, e.estimate.ci95.map(|c| c[1]))?;
        w.text(if e.held { "true" } else { "false" })?;
        optional(&mut w, e.bootstrap_ci95.map(|c| c[0]))?;
        optional(&mut w, e.bootstrap_ci95.map(|c| c[1]))?;
        w.end_row()?;
    }
    let o = &r.objective;
    for (key, value) in [("minus2ll", o.minus2ll), ("aic", o.aic), ("bic", o.bic)] {
        w.row(["objective", key, &cistern::io::output::full(value), "", "", "", "", "false", "", ""])?;
    }
    w.finish().map(drop)
}

fn table(r: &Estimation, width: Option<usize>) -> String {
    let o = &r.objective;
    let mut text = format!(
        "Population estimation ({}{}): {} subjects, {} levels, {} estimated values\n\
         -2 log-likelihood {}   AIC {}   BIC {}   {}\n\n",
        r.method,
        r.nodes.as_ref().map_or(String::new(), |n| if n.min == n.max {
            format!(", {} nodes per random effect", n.min)
        } else {
            format!(", {} to {} nodes per principal axis", n.min, n.max)
        }),
        o.n_subjects,
        o.n_observations,
        o.n_parameters,
        readable(o.minus2ll, 8),
        readable(o.aic, 8),
        readable(o.bic, 8),
        if r.evaluated_only {
            "evaluated at the model's values".to_string()
        } else if r.converged {
            format!("converged ({} adaptations)", r.convergence.adaptations)
        } else {
            "NOT CONVERGED".to_string()
        }
    );
    let bootstrap = r.bootstrap.is_some();
    let mut columns = vec![
        Column::text("estimate"),
        Column::number("value"),
        Column::number("SE"),
        Column::number("RSE %"),
        Column::number("95 % interval"),
    ];
    if bootstrap {
        columns.push(Column::number("bootstrap 95 %").optional(1));
    }
    let interval = |c: Option<[f64; 2]>| {
        c.map_or("—".to_string(), |c| format!("{} – {}", readable(c[0], 4), readable(c[1], 4)))
    };
    let lines: Vec<Vec<String>> = r
        .rows()
        .into_iter()
        .map(|(object, key, e)| {
            let mut row = vec![
                describe(object, key) + if e.held { " (held)" } else { "" },
                readable(e.estimate.value, 4),
                e.estimate.se.map_or("—".into(), |s| readable(s, 3)),
                e.rse_pct.map_or("—".into(), |s| format!("{s:.1}")),
                interval(e.estimate.ci95),
            ];
            if bootstrap {
                row.push(interval(e.bootstrap_ci95));
            }
            row
        })
        .collect();
    text += &render_table(&columns, &lines, width);
    let shrinkage: Vec<String> = r.eta_shrinkage_pct.0.iter().map(|(k, s)| format!("{k} {s:.0} %")).collect();
    text += &format!("\nη-shrinkage: {}\n", shrinkage.join(", "));
    if let Some(b) = &r.bootstrap {
        text += &format!(
            "Bootstrap: {} replicates (seed {}), {:.0} % converged\n",
            b.replicates,
            b.seed,
            100.0 * b.converged_share
        );
    }
    text + &format!("\n{CAUTION}\n")
}
