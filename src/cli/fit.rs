//! `cistern fit`: estimate clearance and volume (and ka for oral drugs) from sampled levels.

use super::args::{OutputArgs, choice, flag_number, flag_value, invalid_flag};
use super::study::StudyArgs;
use cistern::engine::validate_absorption;
use cistern::error::Problems;
use cistern::fit::objective::Weighting;
use cistern::fit::{Estimate, FitOptions, FitResult, Intervals, Method, fit_all};
use cistern::io::output::{
    CAUTION, CsvWriter, Format, RunFiles, full, io_failure, readable, render_table, write_json,
};
use cistern::spec::{DRAWS, Needs};
use cistern::units::Kind;
use cistern::workflow::{Required, Study};
use cistern::{Error, InputError};
use clap::Args;
use serde::Serialize;

/// Estimate each subject's clearance and volume, with 95 % intervals, from sparse levels.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # Bayesian (MAP) fit of every subject against the population model, posterior intervals
  cistern fit --model demo-regimens/model.toml --doses demo-regimens/doses.csv \\
      --levels demo-regimens/levels.csv --covariates demo-regimens/covariates.csv

  # the fast Laplace intervals, as JSON
  cistern fit --model demo-regimens/model.toml --doses demo-regimens/doses.csv \\
      --levels demo-regimens/levels.csv --covariates demo-regimens/covariates.csv \\
      --intervals laplace --format json

  # weighted least squares without a prior, or the two-level method
  cistern fit --method wls --weighting 1/y^2 --doses doses.csv --levels levels.csv
  cistern fit --method two-level --doses doses.csv --levels levels.csv

Levels below the quantification limit are written <LLOQ (e.g. <0.5) and enter the MAP
objective by the M3 likelihood. A parameter given on the command line (--ka) is held fixed.")]
pub struct FitArgs {
    #[command(flatten)]
    study: StudyArgs,
    /// Estimation method [default: map with --model, wls without]
    #[arg(long, value_parser = choice::<Method>())]
    method: Option<Method>,
    /// Interval type
    #[arg(long, value_parser = choice::<Intervals>(), default_value = "posterior")]
    intervals: Intervals,
    /// Posterior draws per subject (importance sampling) [default: the case's, else 2000]
    #[arg(long)]
    draws: Option<u32>,
    /// Seed for the posterior draws [default: the case's, else 1]
    #[arg(long)]
    seed: Option<u64>,
    /// Keep N equal-weight posterior draws per subject in the JSON output (for `cistern plan --fit`)
    #[arg(long, value_name = "N", default_value_t = 0, value_parser = clap::value_parser!(u32).range(0..=100_000))]
    keep_draws: u32,
    /// Least-squares weighting (wls)
    #[arg(long, value_parser = choice::<Weighting>(), default_value = "none")]
    weighting: Weighting,
    /// Hold ka fixed at this value (1/h), e.g. 1.2 or 1.2/h
    #[arg(long, value_name = "KA")]
    ka: Option<String>,
    /// Oral bioavailability when the model gives none [default: 1]
    #[arg(long, value_name = "F", allow_hyphen_values = true)]
    f: Option<String>,
    /// Oral lag time when the model gives none, e.g. 30min [default: 0]
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    tlag: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// The JSON output.
#[derive(Serialize)]
struct FitJson<'a> {
    subjects: &'a [FitResult],
}

/// Run the command.
pub fn run(args: FitArgs) -> Result<(), Error> {
    let mut spec = args.study.spec()?;
    spec.seed.set("--seed", args.seed);
    spec.draws.set("--draws", args.draws);
    let mut problems = Problems::new();
    let ka = match &args.ka {
        Some(t) => problems.take(flag_value("--ka", Kind::RateConstant, t)).map(Some),
        None => Some(None),
    };
    let f = args.f.as_ref().map_or(Some(1.0), |t| problems.take(flag_number("--f", t)));
    let tlag = args.tlag.as_ref().map_or(Some(0.0), |t| problems.take(flag_value("--tlag", Kind::Time, t)));
    if let (Some(ka), Some(f), Some(tlag)) = (ka, f, tlag) {
        problems.take(validate_absorption(ka, f, tlag).map_err(invalid_flag));
    }
    // Kept draws are draws: the same bound as --draws.
    if args.keep_draws > *DRAWS.end() {
        problems.push(InputError::flag(
            "--keep-draws",
            format!("expected at most {} draws per subject, found {}", DRAWS.end(), args.keep_draws),
        ));
    }
    let settings = problems.take_all(spec.resolve(Needs::default()));
    let study =
        problems.take_all(Study::load(&spec.inputs, Required { model: args.method == Some(Method::Map) }));
    let (((Study { model, subjects, notes }, settings), (ka, f)), tlag) =
        problems.finish_with(study.zip(settings).zip(ka.zip(f)).zip(tlag))?;
    let method = args.method.unwrap_or(if model.is_some() { Method::Map } else { Method::Wls });
    for n in &notes {
        args.output.note(n);
    }
    if model.as_ref().is_some_and(|m| m.absorption.is_some()) && (args.f.is_some() || args.tlag.is_some()) {
        args.output
            .note("the model's [absorption] table gives F and the lag time: --f and --tlag are not used");
    }
    // The output is opened before the work, so a bad path fails first.
    let mut sink = args.output.sink(&mut RunFiles::new(spec.files()))?;
    let options = FitOptions {
        method,
        intervals: args.intervals,
        draws: settings.draws,
        seed: settings.seed,
        weighting: args.weighting,
        ka_per_h: ka,
        f,
        tlag_h: tlag,
        keep_draws: args.keep_draws as usize,
    };
    // A subject that cannot be fitted is that subject's result: the others are written, and
    // the failures reported after them.
    let mut fits = Vec::with_capacity(subjects.len());
    let mut failures = Vec::new();
    for (s, outcome) in subjects.iter().zip(fit_all(&subjects, model.as_ref(), &options)) {
        match outcome {
            Ok(r) => fits.push(r),
            Err(e) => failures.push(match &s.id {
                Some(id) => format!("subject {id}: {e}"),
                None => e.to_string(),
            }),
        }
    }
    if fits.is_empty() && !failures.is_empty() {
        return Err(Error::Usage(failures.join("\n")));
    }
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => write_json(out, &FitJson { subjects: &fits }).map_err(io_failure)?,
        Format::Csv => write_csv(out, &fits).map_err(io_failure)?,
        Format::Table => {
            write!(out, "{}", table(&fits)).map_err(io_failure)?;
            writeln!(out, "\n{CAUTION}").map_err(io_failure)?;
        }
    }
    args.output.caution_for_csv(format);
    sink.finish()?;
    if failures.is_empty() {
        Ok(())
    } else {
        Err(Error::Failure(format!(
            "{} of {} subjects could not be fitted:\n{}",
            failures.len(),
            subjects.len(),
            failures.join("\n")
        )))
    }
}

fn estimate_cells(e: Option<&Estimate>) -> [String; 4] {
    let opt = |x: Option<f64>| x.map(full).unwrap_or_default();
    match e {
        Some(e) => [full(e.value), opt(e.se), opt(e.ci95.map(|c| c[0])), opt(e.ci95.map(|c| c[1]))],
        None => Default::default(),
    }
}

fn write_csv(out: &mut dyn std::io::Write, fits: &[FitResult]) -> std::io::Result<()> {
    let names = ["cl_l_h", "v_l", "k_per_h", "half_life_h", "ka_per_h"];
    let mut header = vec!["subject".to_string(), "method".into(), "converged".into(), "objective".into()];
    for n in names {
        header.extend([n.to_string(), format!("{n}_se"), format!("{n}_ci95_lo"), format!("{n}_ci95_hi")]);
    }
    header.push("warnings".into());
    let mut w = CsvWriter::new(out);
    w.row(&header)?;
    for r in fits {
        let e = &r.estimates;
        let mut row = vec![
            r.subject.clone().unwrap_or_default(),
            serde_json::to_value(r.method)
                .ok()
                .and_then(|v| v.as_str().map(str::to_string))
                .unwrap_or_default(),
            r.converged.to_string(),
            full(r.objective),
        ];
        for est in
            [Some(&e.cl_l_h), Some(&e.v_l), Some(&e.k_per_h), Some(&e.half_life_h), e.ka_per_h.as_ref()]
        {
            row.extend(estimate_cells(est));
        }
        row.push(r.warnings.join("; "));
        w.row(&row)?;
    }
    w.finish().map(drop)
}

fn table(fits: &[FitResult]) -> String {
    let mut text = String::new();
    for r in fits {
        let name = r.subject.as_deref().unwrap_or("subject");
        let method = serde_json::to_value(r.method)
            .ok()
            .and_then(|v| v.as_str().map(str::to_string))
            .unwrap_or_default();
        text += &format!(
            "{name} — method {method}, {}, objective {}\n",
            if r.converged { "converged" } else { "NOT converged" },
            readable(r.objective, 6)
        );
        let mut rows = Vec::new();
        for (name, unit, est, typical) in r.named_estimates() {
            let label = format!("{name} ({unit})");
            let ci = est
                .ci95
                .map(|c| format!("{} – {}", readable(c[0], 4), readable(c[1], 4)))
                .unwrap_or_else(|| "—".into());
            rows.push(vec![
                label,
                readable(est.value, 4),
                est.se.map(|s| readable(s, 3)).unwrap_or_else(|| "—".into()),
                ci,
                typical.map(|t| readable(t, 4)).unwrap_or_default(),
            ]);
        }
        text += &render_table(&["parameter", "estimate", "se", "95% interval", "typical"], &rows, &[]);
        let lv: Vec<Vec<String>> = r
            .levels
            .iter()
            .map(|l| {
                vec![
                    readable(l.time_h, 5),
                    match (l.observed_mg_l, l.lloq_mg_l) {
                        (Some(y), _) => readable(y, 4),
                        (None, Some(q)) => format!("<{}", readable(q, 3)),
                        (None, None) => "BLQ".into(),
                    },
                    readable(l.predicted_mg_l, 4),
                    l.weighted_residual.map(|w| readable(w, 3)).unwrap_or_default(),
                ]
            })
            .collect();
        text += &render_table(&["time_h", "observed_mg_l", "predicted_mg_l", "weighted_residual"], &lv, &[]);
        for d in &r.derived_covariates {
            text += &format!("derived: {d}\n");
        }
        for w in &r.warnings {
            text += &format!("warning: {w}\n");
        }
        text.push('\n');
    }
    text
}
