//! `cistern fit`: estimate clearance and volume (and ka for oral drugs) from sampled levels.

use super::args::{OutputArgs, choice, flag_number, flag_value, invalid_flag, whole};
use super::study::StudyArgs;
use cistern::diagnostics::{Diagnostics, LevelDiagnostics, SIMULATIONS, for_fits};
use cistern::engine::validate_absorption;
use cistern::error::{Problems, subjects_phrase};
use cistern::fit::objective::Weighting;
use cistern::fit::{Estimate, FitOptions, FitResult, Intervals, Method, fit_all_reporting};
use cistern::io::labels::label;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, column_decimals, fit_to_width, fixed, full, io_failure,
    number_column, readable, render_table, write_json,
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
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u32>)]
    draws: Option<u32>,
    /// Seed for the posterior draws [default: the case's, else 1]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u64>)]
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
    /// Print each subject's estimates and levels in full in the table, instead of one line
    /// per subject
    #[arg(long)]
    details: bool,
    /// Also write every level with its prediction and residuals to FILE (CSV, one row per
    /// subject and level)
    #[arg(long, value_name = "FILE")]
    levels_out: Option<String>,
    /// Also write every level's diagnostics (PRED, IPRED, IWRES, CWRES, NPDE) to FILE (CSV, one
    /// row per subject and level)
    #[arg(long, value_name = "FILE")]
    diagnostics_out: Option<String>,
    /// Also write the diagnostic plots as SVG into DIR (which must exist): observed against
    /// predicted, CWRES against time and prediction, the NPDE's QQ plot, the individual fits
    /// and the random effects against the covariates
    #[arg(long, value_name = "DIR")]
    plots_dir: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// The JSON output.
#[derive(Serialize)]
struct FitJson<'a> {
    subjects: &'a [FitResult],
    diagnostics: &'a Diagnostics,
    warnings: &'a [cistern::warning::Warning],
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
    let study = problems.take_all(Study::load(
        &spec.inputs,
        Required { model: args.method == Some(Method::Map), levels: true },
    ));
    let (((Study { model, subjects, notices, .. }, settings), (ka, f)), tlag) =
        problems.finish_with(study.zip(settings).zip(ka.zip(f)).zip(tlag))?;
    let method = args.method.unwrap_or(if model.is_some() { Method::Map } else { Method::Wls });
    args.output.notify.notices(&notices);
    if model.as_ref().is_some_and(|m| m.absorption.is_some()) && (args.f.is_some() || args.tlag.is_some()) {
        args.output
            .note("the model's [absorption] table gives F and the lag time: --f and --tlag are not used");
    }
    // The outputs are opened before the work, so a bad path fails first.
    let mut files = RunFiles::new(spec.files());
    let mut sink = args.output.sink(&mut files)?;
    let mut levels_sink = files.open_flag("--levels-out", args.levels_out.as_deref())?;
    let mut diagnostics_sink = files.open_flag("--diagnostics-out", args.diagnostics_out.as_deref())?;
    let plots_dir = super::plots::PlotsDir::open(&mut files, args.plots_dir.as_deref())?;
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
    // The same failure of several subjects is one line naming them.
    let mut fits = Vec::with_capacity(subjects.len());
    let mut fitted = Vec::with_capacity(subjects.len());
    let mut failures: Vec<(String, Vec<String>)> = Vec::new();
    let bar = match subjects.len() {
        0 | 1 => indicatif::ProgressBar::hidden(),
        n => args.output.progress_bar(n as u64, "subjects fitted"),
    };
    let outcomes = fit_all_reporting(&subjects, model.as_ref(), &options, &|| bar.inc(1));
    bar.finish_and_clear();
    for (s, outcome) in subjects.iter().zip(outcomes) {
        match outcome {
            Ok(r) => {
                fits.push(r);
                fitted.push(s);
            }
            Err(e) => {
                let e = e.to_string();
                match failures.iter_mut().find(|(m, _)| *m == e) {
                    Some((_, ids)) => ids.extend(s.id.clone()),
                    None => failures.push((e, s.id.iter().cloned().collect())),
                }
            }
        }
    }
    let failed = subjects.len() - fits.len();
    let failures: Vec<String> = failures
        .into_iter()
        .map(|(m, ids)| if ids.is_empty() { m } else { format!("{}: {m}", subjects_phrase(&ids)) })
        .collect();
    if fits.is_empty() && !failures.is_empty() {
        return Err(Error::Usage(failures.join("\n")));
    }
    let diagnostics = for_fits(&fitted, &mut fits, model.as_ref(), &options, SIMULATIONS);
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => {
            let json =
                FitJson { subjects: &fits, diagnostics: &diagnostics, warnings: &diagnostics.warnings };
            write_json(out, &json).map_err(io_failure)?
        }
        Format::Csv => write_csv(out, &fits).map_err(io_failure)?,
        Format::Table => {
            let width = args.output.table_width();
            let text = if args.details { details(&fits, width) } else { summary(&fits, width) };
            write!(out, "{}", fit_to_width(&format!("{text}\n{CAUTION}\n"), width)).map_err(io_failure)?;
        }
    }
    if let Some(levels) = levels_sink.as_mut() {
        write_levels(levels.writer(), &fits).map_err(io_failure)?;
    }
    for w in &diagnostics.warnings {
        super::args::warn(&w.message);
    }
    if let Some(s) = diagnostics_sink.as_mut() {
        write_diagnostics(s.writer(), &diagnostics.rows).map_err(io_failure)?;
    }
    // The levels and diagnostics files are CSV: pure data, their caution on stderr.
    if format == Format::Csv || levels_sink.is_some() || diagnostics_sink.is_some() {
        eprintln!("caution: {CAUTION}");
    }
    sink.finish()?;
    if let Some(levels) = levels_sink {
        levels.finish()?;
    }
    if let Some(s) = diagnostics_sink {
        s.finish()?;
    }
    if let Some(dir) = plots_dir {
        dir.write(
            &cistern::diagnostics::plots::figures(&diagnostics.rows, &subjects, &fits),
            &args.output.notify,
        )?;
    }
    if failures.is_empty() {
        Ok(())
    } else {
        Err(Error::Failure(format!(
            "{} of {} subjects could not be fitted:\n{}",
            failed,
            subjects.len(),
            failures.join("\n")
        )))
    }
}

fn estimate_cells(e: Option<&Estimate>, typical: Option<f64>) -> [String; 5] {
    let opt = |x: Option<f64>| x.map(full).unwrap_or_default();
    match e {
        Some(e) => {
            [full(e.value), opt(e.se), opt(e.ci95.map(|c| c[0])), opt(e.ci95.map(|c| c[1])), opt(typical)]
        }
        None => Default::default(),
    }
}

fn method_name(r: &FitResult) -> String {
    serde_json::to_value(r.method).ok().and_then(|v| v.as_str().map(str::to_string)).unwrap_or_default()
}

/// `fit`'s CSV: one row per subject (also `population --subjects-out`).
pub(super) fn write_csv(out: &mut dyn std::io::Write, fits: &[FitResult]) -> std::io::Result<()> {
    let names = ["cl_l_h", "v_l", "k_per_h", "half_life_h", "ka_per_h"];
    let mut header = vec![
        "subject".to_string(),
        "method".into(),
        "converged".into(),
        "objective".into(),
        "effective_draws".into(),
    ];
    for n in names {
        header.extend([
            n.to_string(),
            format!("{n}_se"),
            format!("{n}_ci95_lo"),
            format!("{n}_ci95_hi"),
            format!("{n}_typical"),
        ]);
    }
    header.push("warnings".into());
    let mut w = CsvWriter::new(out);
    w.row(&header)?;
    for r in fits {
        let mut row = vec![
            r.subject.clone().unwrap_or_default(),
            method_name(r),
            r.converged.to_string(),
            full(r.objective),
            r.effective_draws.map(full).unwrap_or_default(),
        ];
        // named_estimates lists cl, v, k, half-life and (when estimated) ka, with the
        // typical value for this subject's covariates.
        let named = r.named_estimates();
        for i in 0..names.len() {
            let found = named.get(i);
            row.extend(estimate_cells(found.map(|n| n.2), found.and_then(|n| n.3)));
        }
        row.push(r.warnings.iter().map(|w| w.message.as_str()).collect::<Vec<_>>().join("; "));
        w.row(&row)?;
    }
    w.finish().map(drop)
}

/// The `--levels-out` CSV: every subject's levels with their predictions and residuals.
fn write_levels(out: &mut dyn std::io::Write, fits: &[FitResult]) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    w.row([
        "subject",
        "time_h",
        "observed_mg_l",
        "lloq_mg_l",
        "blq",
        "predicted_mg_l",
        "residual_mg_l",
        "weighted_residual",
    ])?;
    for r in fits {
        for l in &r.levels {
            w.text(r.subject.as_deref().unwrap_or(""))?;
            w.number(l.time_h)?;
            for x in [l.observed_mg_l, l.lloq_mg_l] {
                match x {
                    Some(x) => w.number(x)?,
                    None => w.text("")?,
                }
            }
            w.text(if l.blq { "true" } else { "false" })?;
            w.number(l.predicted_mg_l)?;
            for x in [l.residual_mg_l, l.weighted_residual] {
                match x {
                    Some(x) => w.number(x)?,
                    None => w.text("")?,
                }
            }
            w.end_row()?;
        }
    }
    w.finish().map(drop)
}

/// `--diagnostics-out` of `fit` and `population`: one row per subject and level.
pub(super) fn write_diagnostics(
    out: &mut dyn std::io::Write,
    rows: &[LevelDiagnostics],
) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    w.row([
        "subject",
        "time_h",
        "time_after_dose_h",
        "observed_mg_l",
        "lloq_mg_l",
        "blq",
        "pred_mg_l",
        "ipred_mg_l",
        "iwres",
        "cwres",
        "npde",
    ])?;
    for r in rows {
        w.text(r.subject.as_deref().unwrap_or(""))?;
        w.number(r.time_h)?;
        w.number(r.time_after_dose_h)?;
        let optional = |w: &mut CsvWriter<&mut dyn std::io::Write>, x: Option<f64>| match x {
            Some(x) => w.number(x),
            None => w.text(""),
        };
        optional(&mut w, r.observed_mg_l)?;
        optional(&mut w, r.lloq_mg_l)?;
        w.text(if r.blq { "true" } else { "false" })?;
        optional(&mut w, r.pred_mg_l)?;
        w.number(r.ipred_mg_l)?;
        for x in [r.iwres, r.cwres, r.npde] {
            optional(&mut w, x)?;
        }
        w.end_row()?;
    }
    w.finish().map(drop)
}

/// The study at a glance: one line per subject with the clearance and volume, their 95 %
/// intervals and typical values, the half-life, convergence and warnings.
fn summary(fits: &[FitResult], width: Option<usize>) -> String {
    // Positions in FitResult::named_estimates (clearance, volume, k, half-life, ka), a short
    // name, and how readily the estimate and its interval are left out on a narrow terminal.
    let mut estimates = vec![
        ("cl_l_h", 0, "clearance", 0, 2),
        ("v_l", 1, "volume", 0, 2),
        ("half_life_h", 3, "half-life", 3, 4),
    ];
    if fits.iter().any(|r| r.estimates.ka_per_h.is_some()) {
        estimates.push(("ka_per_h", 4, "ka", 0, 4));
    }
    let mut columns = vec![Column::text("subject")];
    let mut cells: Vec<Vec<String>> = Vec::new();
    for &(key, position, name, rank, interval_rank) in &estimates {
        let unit = cistern::io::labels::name_and_unit(key).1;
        let value = |f: &dyn Fn(&Estimate) -> Option<f64>| -> Vec<Option<f64>> {
            fits.iter().map(|r| r.named_estimates().get(position).and_then(|n| f(n.2))).collect()
        };
        let (estimate, lo, hi) =
            (value(&|e| Some(e.value)), value(&|e| e.ci95.map(|c| c[0])), value(&|e| e.ci95.map(|c| c[1])));
        let typical: Vec<Option<f64>> =
            fits.iter().map(|r| r.named_estimates().get(position).and_then(|n| n.3)).collect();
        // The estimate, its interval and the typical value share one number of decimals.
        let d = column_decimals([&estimate, &lo, &hi, &typical].into_iter().flatten().flatten().copied(), 3);
        let cell = |x: &Option<f64>| x.map_or_else(|| "—".to_string(), |x| fixed(x, d));
        columns.push(Column::number(format!("{name}\n({unit})")).optional(rank));
        cells.push(estimate.iter().map(cell).collect());
        columns.push(Column::number("95 %\ninterval").optional(interval_rank));
        cells.push(
            lo.iter()
                .zip(&hi)
                .map(|(a, b)| match (a, b) {
                    (Some(_), Some(_)) => format!("{}–{}", cell(a), cell(b)),
                    _ => "—".into(),
                })
                .collect(),
        );
        if position < 2 {
            columns.push(Column::number(format!("typical\n({unit})")).optional(1));
            cells.push(typical.iter().map(cell).collect());
        }
    }
    columns.push(Column::text("converged"));
    columns.push(Column::number("warnings"));
    let rows: Vec<Vec<String>> = fits
        .iter()
        .enumerate()
        .map(|(i, r)| {
            let mut row = vec![r.subject.clone().unwrap_or_else(|| "—".into())];
            row.extend(cells.iter().map(|c| c[i].clone()));
            row.push(if r.converged { "yes".into() } else { "NO".into() });
            row.push(r.warnings.len().to_string());
            row
        })
        .collect();
    let methods: Vec<String> = {
        let mut m: Vec<String> = fits.iter().map(method_name).collect();
        m.dedup();
        m
    };
    let mut text = format!("{} subjects fitted, method {}\n", fits.len(), methods.join(", "));
    text += &render_table(&columns, &rows, width);
    text += "Typical: the population's value for the subject's covariates. --details shows each \
             subject's levels; --format csv or json has every number.\n";
    for r in fits {
        for w in &r.warnings {
            text += &format!("{}: warning: {w}\n", r.subject.as_deref().unwrap_or("subject"));
        }
    }
    text
}

/// Each subject in full: the estimates with their se, interval and typical value, and the
/// levels with their predictions.
fn details(fits: &[FitResult], width: Option<usize>) -> String {
    let mut text = String::new();
    for r in fits {
        let name = r.subject.as_deref().unwrap_or("subject");
        text += &format!(
            "{name} — method {}, {}, objective {}\n",
            method_name(r),
            if r.converged { "converged" } else { "NOT converged" },
            readable(r.objective, 6)
        );
        let mut rows = Vec::new();
        for (name, unit, est, typical) in r.named_estimates() {
            // One row's numbers share one unit: one number of decimals for them all.
            let values = [Some(est.value), est.se, est.ci95.map(|c| c[0]), est.ci95.map(|c| c[1]), typical];
            let cells = number_column(&values, 4);
            rows.push(vec![
                format!("{name} ({unit})"),
                cells[0].clone(),
                cells[1].clone(),
                if est.ci95.is_some() { format!("{} – {}", cells[2], cells[3]) } else { "—".into() },
                if typical.is_some() { cells[4].clone() } else { String::new() },
            ]);
        }
        let columns = [
            Column::text("parameter"),
            Column::number("estimate"),
            Column::number("SE").optional(1),
            Column::number("95 % interval"),
            Column::number("typical"),
        ];
        text += &render_table(&columns, &rows, width);
        let levels = &r.levels;
        let times = number_column(&levels.iter().map(|l| Some(l.time_h)).collect::<Vec<_>>(), 5);
        let observed = number_column(&levels.iter().map(|l| l.observed_mg_l).collect::<Vec<_>>(), 4);
        let predicted = number_column(&levels.iter().map(|l| Some(l.predicted_mg_l)).collect::<Vec<_>>(), 4);
        let weighted = number_column(&levels.iter().map(|l| l.weighted_residual).collect::<Vec<_>>(), 3);
        let lv: Vec<Vec<String>> = levels
            .iter()
            .enumerate()
            .map(|(i, l)| {
                vec![
                    times[i].clone(),
                    match (l.observed_mg_l, l.lloq_mg_l) {
                        (Some(_), _) => observed[i].clone(),
                        (None, Some(q)) => format!("<{}", readable(q, 3)),
                        (None, None) => "BLQ".into(),
                    },
                    predicted[i].clone(),
                    if l.weighted_residual.is_some() { weighted[i].clone() } else { String::new() },
                ]
            })
            .collect();
        let columns = ["time_h", "observed_mg_l", "predicted_mg_l", "weighted_residual"]
            .map(|k| Column::number(label(k).replacen(" (", "\n(", 1)));
        text += &render_table(&columns, &lv, width);
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
