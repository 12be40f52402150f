//! `cistern sweep`: candidate regimens over a virtual population — PTA, limit risks and
//! exposure percentiles per regimen; one shard of the subjects with `--shard`.

use super::args::{OutputArgs, flag_number, flag_value, invalid_flag, whole};
use super::regimen_grid::GridArgs;
use cistern::dosing::Route;
use cistern::engine::validate_absorption;
use cistern::error::Problems;
use cistern::io::output::{CAUTION, Format, RunFiles, io_failure};
use cistern::spec::{Grid, Needs, Setting, Spec, Stated, SweepSpec};
use cistern::sweep::Sweep;
use cistern::sweep::sketch::RELATIVE_ERROR;
use cistern::sweep::state::{Setup, Shard};
use cistern::sweep::summary::Summary;
use cistern::units::Kind;
use cistern::workflow::sweep::{Source, VirtualPopulation, population};
use cistern::{Error, InputError, Origin, case};
use clap::Args;
use std::path::{Path, PathBuf};

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
  cistern sweep --model model.toml --subjects 1000000 ... --shard 3/8 -o shard-3.json \\
      --per-subject part-3.csv

Each subject's draws come from the seed and the subject's number alone, so the output is the
same for any number of threads (RAYON_NUM_THREADS) and shards. Percentiles come from a
fixed-size sketch and are within 0.1 % of the exact sample percentiles. See docs/sweeps.md.")]
pub struct SweepArgs {
    /// A case file (TOML) giving the model, the covariate pool, the number of subjects, the
    /// seed, the targets, limits and candidates; flags override it
    #[arg(long, value_name = "FILE", conflicts_with = "params")]
    case: Option<String>,
    /// Population model (TOML) to draw subjects from
    #[arg(long, value_name = "FILE")]
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
    #[arg(long, value_name = "N", conflicts_with = "params", allow_negative_numbers = true, value_parser = whole::<u64>)]
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
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u64>)]
    seed: Option<u64>,
    #[command(flatten)]
    grid: GridArgs,
    /// Compute only the I-th of N slices of the subjects and write its state (JSON) instead of
    /// the summary; combine the N states with `cistern merge`. With --per-subject the state
    /// records the rows' number and SHA-256, which `merge --rows` checks before joining them
    #[arg(long, value_name = "I/N", allow_hyphen_values = true)]
    shard: Option<String>,
    /// Also write one row per subject and regimen to FILE (CSV; `-` is stdout)
    #[arg(long, value_name = "FILE")]
    per_subject: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// Run the command.
pub fn run(args: SweepArgs) -> Result<(), Error> {
    let mut spec = match &args.case {
        Some(path) => case::read(path)?,
        None => Spec::new(),
    };
    spec.inputs.model.set("--model", args.model.as_ref().map(PathBuf::from));
    spec.seed.set("--seed", args.seed);
    // Subjects drawn from a model: how many, and where their covariates come from (a table of
    // individual parameters needs neither).
    if args.params.is_none() {
        let sweep = spec.sweep.get_or_insert_with(|| SweepSpec {
            subjects: Setting::unset(Origin::Flag("--subjects".into())),
            covariates: Setting::unset(Origin::Flag("--covariates".into())),
        });
        sweep.subjects.set("--subjects", args.subjects);
        // Covariate distributions replace the case's pool.
        if !args.draws.is_empty() {
            sweep.covariates = Setting::unset(Origin::Flag("--covariates".into()));
        }
        sweep.covariates.set("--covariates", args.covariates.as_ref().map(PathBuf::from));
    }
    let mut problems = Problems::new();
    args.grid.apply(&mut spec, &mut problems);
    let settings = problems.take_all(spec.resolve(Needs { grid: true }));
    let grid = settings.as_ref().and_then(|s| s.grid.clone());
    let oral = grid.as_ref().is_some_and(|g| g.candidates.iter().any(|c| c.route == Route::Oral));
    let shard = match &args.shard {
        Some(t) => problems.take(Shard::parse(t).map_err(|m| InputError::flag("--shard", m))),
        None => Some(Shard::WHOLE),
    };
    let source = match &args.params {
        Some(path) => {
            let f = args.f.as_ref().map_or(Some(1.0), |t| problems.take(flag_number("--f", t)));
            let tlag =
                args.tlag.as_ref().map_or(Some(0.0), |t| problems.take(flag_value("--tlag", Kind::Time, t)));
            if let (Some(f), Some(tlag)) = (f, tlag) {
                problems.take(validate_absorption(None, f, tlag).map_err(invalid_flag));
            }
            let path = Stated { value: PathBuf::from(path), origin: Origin::Flag("--params".into()) };
            f.zip(tlag).map(|(f, tlag_h)| Source::Params { path, f, tlag_h })
        }
        None => {
            let flag = Origin::Flag("--draw".into());
            let draws = args.draws.iter().map(|d| Stated { value: d.clone(), origin: flag.clone() });
            Some(Source::Model { draws: draws.collect() })
        }
    };
    let population = source.and_then(|source| problems.take_all(population(&spec, &source, oral)));
    if args.shard.is_some() && args.output.format.is_some_and(|f| f != Format::Json) {
        problems.push(InputError::flag("--format", "a shard writes its state as JSON; leave out --format"));
    }
    let ((grid, shard), virtual_population) = problems.finish_with(grid.zip(shard).zip(population))?;
    let VirtualPopulation { population, subjects, described, notices } = virtual_population;
    args.output.notify.notices(&notices);
    grid.warnings.iter().for_each(|w| super::args::warn(w));
    let Grid { candidates, targets, limits, .. } = grid;
    let seed = spec.seed();
    let sweep =
        Sweep { population: &population, candidates: &candidates, targets: &targets, limits: &limits, seed };
    sweep.check()?;
    let setup = Setup::new(described, seed, subjects, &candidates, &targets, &limits);
    let span = shard.span(subjects);

    // The outputs are opened before the work, so a bad path fails first.
    let mut files =
        RunFiles::new(spec.files().iter().map(PathBuf::as_path).chain(args.params.as_deref().map(Path::new)));
    let mut sink = args.output.sink(&mut files)?;
    let mut per_subject = files.open_flag("--per-subject", args.per_subject.as_deref())?;
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
    let bar = args.output.progress_bar(span.end - span.start, "subjects");
    let state =
        sweep.run_shard(setup, shard, per_subject.as_mut().map(|s| s.writer()), &mut |n| bar.inc(n))?;
    bar.finish_and_clear();

    let format = if args.shard.is_some() { Format::Json } else { args.output.format() };
    let out = sink.writer();
    if args.shard.is_some() {
        state.write(out).map_err(io_failure)?;
    } else {
        Summary::of(&state).write(out, format, args.output.table_width()).map_err(io_failure)?;
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
