//! `cistern sweep`: candidate regimens over a virtual population — PTA, limit risks and
//! exposure percentiles per regimen; one shard of the subjects with `--shard`.

use super::args::{OutputArgs, Problems, flag_number, flag_value, invalid_flag};
use super::regimen_grid::GridArgs;
use super::study::take_all;
use cistern::case::Case;
use cistern::covariates::parse_covariates;
use cistern::dosing::Route;
use cistern::engine::validate_absorption;
use cistern::io::digest::sha256_hex;
use cistern::io::output::{CAUTION, Format, Sink, full, io_failure};
use cistern::io::table::Table;
use cistern::model::PopulationModel;
use cistern::sweep::Sweep;
use cistern::sweep::population::{CovariateSource, Population, parse_draw, parse_params};
use cistern::sweep::sketch::RELATIVE_ERROR;
use cistern::sweep::state::{Setup, Shard, SweepState};
use cistern::sweep::summary::Summary;
use cistern::units::Kind;
use cistern::{Error, InputError};
use clap::Args;
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::json;
use std::io::IsTerminal;

/// Sweep candidate regimens over a virtual population: for each regimen the probability of
/// target attainment (PTA), the probability of breaking each exposure limit, and the 5th,
/// 50th and 95th percentiles of the steady-state trough, peak and AUC24.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # 2,000 subjects drawn from the model, covariates resampled from a pool of subjects
  cistern sweep --model demo-regimens/model.toml --covariates demo-regimens/covariates.csv \\
      --subjects 2000 --amounts 500..2000/250 --every 8h,12h,24h --max-rate 10mg/min \\
      --target auc24=400..600 --max-trough 20 -o summary.csv

  # covariates drawn from stated distributions, per-subject rows as well
  cistern sweep --model demo-regimens/model.toml --subjects 5000 \\
      --draw weight_kg=normal:75:12:40..150 --draw age_y=uniform:30:85 \\
      --draw scr_mg_dl=lognormal:1:0.3 --draw sex=F:0.5 \\
      --amounts 1g,1.5g --every 12h --durations 1h,2h --target trough=10..20 \\
      --per-subject subjects.csv -o summary.csv

  # the individual estimates of a fitted study (the CSV output of cistern fit)
  cistern sweep --params fits.csv --amounts 750,1g --every 12h --durations 1h --target auc24=400..600

  # the 3rd of 8 shards, for a cluster; combine the eight with cistern merge
  cistern sweep --model model.toml --subjects 1000000 ... --shard 3/8 -o shard-3.json

Each subject's draws come from the seed and the subject's number alone, so the output is the
same for any number of threads (RAYON_NUM_THREADS) and shards. Percentiles come from a
fixed-size sketch and are within 0.1 % of the exact sample percentiles. See docs/sweeps.md.")]
pub struct SweepArgs {
    /// A case file (TOML) giving the model, the covariate pool, the number of subjects, the
    /// seed, the targets, limits and candidates; flags override it
    #[arg(long, value_name = "FILE", conflicts_with = "params")]
    case: Option<String>,
    /// Population model (TOML) to draw subjects from
    #[arg(long, value_name = "FILE", required_unless_present_any = ["params", "case"])]
    model: Option<String>,
    /// Covariates CSV (subject plus covariate columns) to resample subjects' covariates from,
    /// uniformly with replacement
    #[arg(long, value_name = "FILE", conflicts_with_all = ["draws", "params"])]
    covariates: Option<String>,
    /// Draw a covariate: NAME=normal:MEAN:SD, NAME=lognormal:MEDIAN:CV (either optionally
    /// truncated, :LO..HI; positive by default), NAME=uniform:LO:HI, NAME=VALUE, or
    /// sex=F:P (female with probability P); repeatable
    #[arg(long = "draw", value_name = "NAME=DIST", conflicts_with = "params", allow_hyphen_values = true)]
    draws: Vec<String>,
    /// Number of virtual subjects to draw from the model
    #[arg(long, value_name = "N", conflicts_with = "params")]
    subjects: Option<u64>,
    /// Individual parameters CSV (cl_l_h, v_l, optional ka_per_h, subject, converged): one
    /// subject per row, instead of drawing from a model
    #[arg(long, value_name = "FILE", conflicts_with = "model")]
    params: Option<String>,
    /// Oral bioavailability for --params subjects [default: 1]
    #[arg(long, value_name = "F", requires = "params")]
    f: Option<String>,
    /// Oral lag time for --params subjects, e.g. 30min [default: 0]
    #[arg(long, value_name = "TIME", requires = "params")]
    tlag: Option<String>,
    /// Seed of the subjects' draws [default: the case's, else 1]
    #[arg(long)]
    seed: Option<u64>,
    #[command(flatten)]
    grid: GridArgs,
    /// Compute only the I-th of N slices of the subjects and write its state (JSON) instead of
    /// the summary; combine the N states with `cistern merge`
    #[arg(long, value_name = "I/N", allow_hyphen_values = true)]
    shard: Option<String>,
    /// Also write one row per subject and regimen to FILE (CSV; `-` is stdout)
    #[arg(long, value_name = "FILE")]
    per_subject: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

impl SweepArgs {
    /// These flags with the case file filling in those left out (the grid aside: see
    /// [`GridArgs::grid_or_case`]).
    fn with_case(self, case: &Case) -> SweepArgs {
        let text = |p: &Option<std::path::PathBuf>| p.as_ref().map(|p| p.to_string_lossy().into_owned());
        let pool = case.sweep.as_ref().and_then(|s| text(&s.covariates));
        SweepArgs {
            model: self.model.clone().or_else(|| text(&case.model)),
            covariates: self.covariates.clone().or(if self.draws.is_empty() { pool } else { None }),
            subjects: self.subjects.or(case.sweep.as_ref().map(|s| s.subjects)),
            seed: self.seed.or(case.seed),
            ..self
        }
    }
}

/// A file's fingerprint, so shards of a sweep can tell that they read the same inputs.
fn file_fingerprint(path: &str) -> Result<String, Error> {
    std::fs::read(path)
        .map(|bytes| sha256_hex(&bytes))
        .map_err(|e| InputError::new(path, format!("cannot read the file: {e}")).into())
}

/// The population, its size, and its description for the sweep's setup.
fn population(
    args: &SweepArgs,
    oral: bool,
    problems: &mut Problems,
) -> Result<Option<(Population, u64, serde_json::Value)>, Error> {
    if let Some(path) = &args.params {
        let f = args.f.as_ref().map_or(Some(1.0), |t| problems.take(flag_number("--f", t)));
        let tlag =
            args.tlag.as_ref().map_or(Some(0.0), |t| problems.take(flag_value("--tlag", Kind::Time, t)));
        if let (Some(f), Some(tlag)) = (f, tlag) {
            problems.take(validate_absorption(None, f, tlag).map_err(invalid_flag));
        }
        let Some((rows, notes)) = take_all(
            problems,
            Table::read(path).and_then(|t| parse_params(&t, oral, f.unwrap_or(1.0), tlag.unwrap_or(0.0))),
        ) else {
            return Ok(None);
        };
        notes.iter().for_each(|n| args.output.note(n));
        let described = json!({
            "params": file_fingerprint(path)?,
            "f": f.map(full),
            "tlag_h": tlag.map(full),
        });
        let n = rows.len() as u64;
        return Ok(Some((Population::from_params(rows), n, described)));
    }
    let Some(path) = &args.model else {
        // The flags require --model or --params; only a case can leave both out.
        if let Some(case) = &args.case {
            problems.push(
                InputError::new(
                    case,
                    "a sweep draws its subjects from a population model: add inputs.model, or give --model",
                )
                .in_column("inputs.model"),
            );
        }
        return Ok(None);
    };
    let model = take_all(problems, PopulationModel::read(path));
    let subjects = match args.subjects {
        Some(0) => {
            problems.push(InputError::new("--subjects", "expected at least 1 subject"));
            None
        }
        Some(n) => Some(n),
        None => {
            problems.push(InputError::new(
                "--subjects",
                "give the number of subjects to draw, e.g. --subjects 10000",
            ));
            None
        }
    };
    let (source, source_name) = if let Some(pool) = &args.covariates {
        let pool = take_all(problems, Table::read(pool).and_then(|t| parse_covariates(&t)));
        (pool.map(CovariateSource::Pool), args.covariates.clone().unwrap_or_default())
    } else if !args.draws.is_empty() {
        let mut draws = Vec::new();
        for spec in &args.draws {
            match parse_draw(spec) {
                Ok(d) => draws.push(d),
                Err(m) => problems.push(InputError::new("--draw", m)),
            }
        }
        (Some(CovariateSource::Draws(draws)), "--draw".to_string())
    } else {
        (Some(CovariateSource::None), path.clone())
    };
    let (Some(model), Some(subjects), Some(source)) = (model, subjects, source) else {
        return Ok(None);
    };
    if oral && model.absorption.is_none() {
        problems.push(InputError::new(path, "oral candidates need an [absorption] table in the model"));
        return Ok(None);
    }
    let described = json!({
        "model": file_fingerprint(path)?,
        "covariates": args.covariates.as_deref().map(file_fingerprint).transpose()?,
        "draws": args.draws,
    });
    match Population::from_model(model, source) {
        Ok(p) => Ok(Some((p, subjects, described))),
        Err(m) => {
            problems.push(InputError::new(source_name, m));
            Ok(None)
        }
    }
}

/// Run the command.
pub fn run(args: SweepArgs) -> Result<(), Error> {
    let case = args.case.as_deref().map(Case::read).transpose().map_err(Error::Input)?;
    let grid = args.grid.grid_or_case(case.as_ref());
    let args = match &case {
        Some(case) => args.with_case(case),
        None => args,
    };
    let seed = args.seed.unwrap_or(cistern::fit::FitOptions::default().seed);
    let mut problems = Problems::new();
    let grid = match grid {
        Ok(g) => Some(g),
        Err(Error::Input(errors)) => {
            errors.into_iter().for_each(|e| problems.push(e));
            None
        }
        Err(e) => return Err(e),
    };
    let oral = grid.as_ref().is_some_and(|(c, _, _)| c.iter().any(|c| c.route == Route::Oral));
    let shard = match &args.shard {
        Some(t) => problems.take(Shard::parse(t).map_err(|m| InputError::new("--shard", m))),
        None => Some(Shard::WHOLE),
    };
    let population = population(&args, oral, &mut problems)?;
    if args.shard.is_some() && args.output.format.is_some_and(|f| f != Format::Json) {
        problems.push(InputError::new("--format", "a shard writes its state as JSON; leave out --format"));
    }
    if let Some(rows) = &args.per_subject {
        let summary = args.output.output.as_deref().unwrap_or("-");
        if rows == summary {
            problems.push(InputError::new(
                "--per-subject",
                format!("'{rows}' is also where the summary goes (-o); give them different files"),
            ));
        }
    }
    problems.finish()?;
    let (Some((candidates, targets, limits)), Some(shard), Some((population, subjects, described))) =
        (grid, shard, population)
    else {
        return Err(Error::Usage("the arguments could not be read".into()));
    };
    let sweep =
        Sweep { population: &population, candidates: &candidates, targets: &targets, limits: &limits, seed };
    sweep.check()?;
    let setup = Setup::new(described, seed, subjects, &candidates, &targets, &limits);
    let span = shard.span(subjects);

    let inputs: Vec<&str> =
        [args.case.as_deref(), args.model.as_deref(), args.covariates.as_deref(), args.params.as_deref()]
            .into_iter()
            .flatten()
            .collect();
    let mut per_subject = match &args.per_subject {
        Some(path) => Some(Sink::open(Some(path), &inputs)?),
        None => None,
    };
    let mut sink = args.output.sink(&inputs)?;
    let where_ = if args.shard.is_some() {
        format!(", shard {}/{}: subjects {}–{}", shard.index, shard.count, span.start + 1, span.end)
    } else {
        String::new()
    };
    args.output.note(&format!(
        "sweeping {} regimens over {subjects} subjects{where_}; percentiles within {} % of the exact sample percentiles",
        candidates.len(),
        100.0 * RELATIVE_ERROR
    ));
    let bar = if std::io::stderr().is_terminal() && !args.output.quiet {
        let bar = ProgressBar::new(span.end - span.start);
        if let Ok(style) = ProgressStyle::with_template("{bar:40} {pos}/{len} subjects, {eta} left") {
            bar.set_style(style);
        }
        bar
    } else {
        ProgressBar::hidden()
    };
    let tallies = sweep.run(span, per_subject.as_mut().map(|s| s.writer()), &mut |n| bar.inc(n))?;
    bar.finish_and_clear();
    let state = SweepState::new(setup, shard, tallies);

    let format = if args.shard.is_some() { Format::Json } else { args.output.format() };
    let out = sink.writer();
    if args.shard.is_some() {
        serde_json::to_writer(&mut *out, &state).map_err(|e| io_failure(e.into()))?;
        writeln!(out).map_err(io_failure)?;
    } else {
        Summary::of(&state).write(out, format).map_err(io_failure)?;
    }
    // The caution travels on stderr with data that cannot carry it (CSV, shard states,
    // per-subject rows); tables and JSON summaries carry it themselves.
    if args.shard.is_some() || format == Format::Csv || args.per_subject.is_some() {
        eprintln!("caution: {CAUTION}");
    }
    if let Some(s) = per_subject {
        s.finish()?;
    }
    sink.finish()
}
