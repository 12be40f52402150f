//! `cistern vpc`: the visual predictive check of a population model against a study.

use super::args::{OutputArgs, choice, flag_value, whole};
use super::study::StudyArgs;
use cistern::diagnostics::vpc::{
    BinBy, Bins, Compared, MAX_REPLICATES, REPLICATES, Vpc, VpcBin, VpcOptions, plot, vpc,
};
use cistern::error::Problems;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, io_failure, readable, render_table,
    write_json,
};
use cistern::spec::Needs;
use cistern::units::Kind;
use cistern::workflow::{Required, Study};
use cistern::{Error, InputError, Origin};
use clap::Args;
use std::io::Write;

/// Visual predictive check: replicate studies simulated from the model with the study's own
/// doses, times and covariates; per bin, the observed 5th, 50th and 95th percentiles beside
/// the 90 % intervals of the same percentiles over the replicates.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # 500 replicates of the study from the fitted model, bins from the sampling clusters
  cistern vpc --model fitted.toml --doses doses.csv --levels levels.csv \\
      --covariates covariates.csv -o vpc.csv --svg vpc.svg

  # prediction-corrected, by time on the files' clock, bins with given edges
  cistern vpc --model fitted.toml --doses doses.csv --levels levels.csv \\
      --prediction-corrected --bin-by time --bins 0,2h,6h,12h,24h,48h

Percentiles are nearest-rank; a level below its limit ranks below every measured one, and a
percentile that falls on such a level is below the limit and left empty. The fraction below
the limit stands beside its own interval.")]
pub struct VpcArgs {
    #[command(flatten)]
    study: StudyArgs,
    /// Replicate studies to simulate, 1 to 100000
    #[arg(long, value_name = "N", default_value_t = REPLICATES as u32,
          value_parser = clap::value_parser!(u32).range(1..=MAX_REPLICATES as i64))]
    replicates: u32,
    /// Seed of the replicates [default: the case's, else 1]
    #[arg(long, allow_negative_numbers = true, value_parser = whole::<u64>)]
    seed: Option<u64>,
    /// The time the levels are binned by
    #[arg(long, value_parser = choice::<BinBy>(), default_value = "time-after-dose")]
    bin_by: BinBy,
    /// The bins: `auto` (the data's sampling clusters) or their edges, increasing and
    /// comma-separated (e.g. 0,1h,4h,12h,24h; bins hold [a, b), the last also its end)
    #[arg(long, value_name = "auto|EDGES", default_value = "auto", allow_hyphen_values = true)]
    bins: String,
    /// Prediction-corrected VPC (Bergstrand et al. 2011): each level scaled by the median
    /// population prediction of its bin over its own
    #[arg(long)]
    prediction_corrected: bool,
    /// Also write the plot to FILE (SVG)
    #[arg(long, value_name = "FILE")]
    svg: Option<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// `--bins`: `auto` or the edges.
fn bins(text: &str) -> Result<Bins, InputError> {
    if text.trim() == "auto" {
        return Ok(Bins::Auto);
    }
    let edges =
        text.split(',').map(|e| flag_value("--bins", Kind::Time, e)).collect::<Result<Vec<_>, _>>()?;
    cistern::diagnostics::vpc::bins::check_edges(&edges).map_err(|m| InputError::flag("--bins", m))?;
    Ok(Bins::Edges(edges))
}

/// Run the command.
pub fn run(args: VpcArgs) -> Result<(), Error> {
    let mut spec = args.study.spec()?;
    spec.seed.set("--seed", args.seed);
    let mut problems = Problems::new();
    let binning = problems.take(bins(&args.bins));
    let settings = problems.take_all(spec.resolve(Needs::default()));
    let study = problems.take_all(Study::load(&spec.inputs, Required { model: true, levels: true }));
    let ((Study { model, subjects, notices, .. }, settings), binning) =
        problems.finish_with(study.zip(settings).zip(binning))?;
    args.output.notify.notices(&notices);
    let model = model.ok_or_else(|| Error::Usage("the check needs the population model (--model)".into()))?;
    let mut files = RunFiles::new(spec.files());
    let mut sink = args.output.sink(&mut files)?;
    let mut svg_sink = files.open_flag("--svg", args.svg.as_deref())?;
    let options = VpcOptions {
        replicates: args.replicates as usize,
        seed: settings.seed,
        bin_by: args.bin_by,
        bins: binning,
        prediction_corrected: args.prediction_corrected,
    };
    let flag = |field: &str| match field {
        "replicates" => Some(Origin::Flag("--replicates".into())),
        "bins" => Some(Origin::Flag("--bins".into())),
        _ => None,
    };
    let result = vpc(&subjects, &model, &options).map_err(|e| Error::from(e).located(flag))?;
    for n in &result.notes {
        args.output.note(n);
    }
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => write_json(out, &result),
        Format::Csv => write_csv(out, &result),
        Format::Table => {
            let width = args.output.table_width();
            write!(out, "{}", fit_to_width(&table(&result, width), width))
        }
    }
    .map_err(io_failure)?;
    if let Some(svg) = svg_sink.as_mut() {
        let panels = plot::panels(&result);
        write!(svg.writer(), "{}", cistern::report::svg::render_svg(&panels, CAUTION)).map_err(io_failure)?;
    }
    args.output.caution_for_csv(format);
    sink.finish()?;
    svg_sink.map_or(Ok(()), |s| s.finish())
}

/// The CSV key prefixes of the compared statistics, in the order of [`compared`].
const STATISTICS: [&str; 4] = ["p05", "p50", "p95", "blq_fraction"];

/// The compared statistics of a bin.
fn compared(b: &VpcBin) -> [&Compared; 4] {
    [&b.p05_mg_l, &b.p50_mg_l, &b.p95_mg_l, &b.blq_fraction]
}

/// One row per bin; an empty cell for a value below the limit.
fn write_csv(out: &mut dyn Write, r: &Vpc) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    let mut header: Vec<String> =
        ["bin", "from_h", "to_h", "mid_h", "levels", "blq"].iter().map(|s| s.to_string()).collect();
    for key in STATISTICS {
        let unit = if key == "blq_fraction" { "" } else { "_mg_l" };
        for part in ["obs", "sim_lo", "sim_median", "sim_hi"] {
            header.push(format!("{key}_{part}{unit}"));
        }
    }
    w.row(&header)?;
    for b in &r.bins {
        w.integer(b.bin as u64)?;
        for x in [b.from_h, b.to_h, b.mid_h] {
            w.number(x)?;
        }
        w.integer(b.levels as u64)?;
        w.integer(b.blq as u64)?;
        for c in compared(b) {
            for x in [c.observed, c.simulated_lo, c.simulated_median, c.simulated_hi] {
                match x {
                    Some(x) => w.number(x)?,
                    None => w.text("")?,
                }
            }
        }
        w.end_row()?;
    }
    w.finish().map(drop)
}

/// A compared statistic as `observed (lo–hi)`, `<LLOQ` for a value below the limit.
fn cell(c: &Compared, digits: usize) -> String {
    let v = |x: Option<f64>| x.map_or_else(|| "<LLOQ".to_string(), |x| readable(x, digits));
    format!("{} ({}–{})", v(c.observed), v(c.simulated_lo), v(c.simulated_hi))
}

/// One line per bin: its range, levels, and each observed statistic with its interval.
fn table(r: &Vpc, width: Option<usize>) -> String {
    let limits = r.bins.iter().any(|b| b.blq_fraction.simulated_hi.is_some_and(|x| x > 0.0) || b.blq > 0);
    let mut columns = vec![
        Column::text("bin"),
        Column::number("time\n(h)"),
        Column::number("levels"),
        Column::number("5th percentile\n(mg/L)"),
        Column::number("median\n(mg/L)"),
        Column::number("95th percentile\n(mg/L)"),
    ];
    if limits {
        columns.push(Column::number("fraction\nbelow limit"));
    }
    let rows: Vec<Vec<String>> = r
        .bins
        .iter()
        .map(|b| {
            let mut row = vec![
                b.bin.to_string(),
                format!("{}–{}", readable(b.from_h, 4), readable(b.to_h, 4)),
                b.levels.to_string(),
            ];
            row.extend([&b.p05_mg_l, &b.p50_mg_l, &b.p95_mg_l].map(|c| cell(c, 3)));
            if limits {
                row.push(cell(&b.blq_fraction, 2));
            }
            row
        })
        .collect();
    let mut text = format!(
        "{}isual predictive check: {} levels in {} bins by {}, {} replicates (seed {})\n\
         Each cell: the observed value (the 90 % interval of the same statistic over the replicates)\n",
        if r.prediction_corrected { "Prediction-corrected v" } else { "V" },
        r.levels,
        r.bins.len(),
        r.bin_by,
        r.replicates,
        r.seed
    );
    text += &render_table(&columns, &rows, width);
    text += &format!(
        "\nObserved percentiles inside their interval: {} of {}\n\n{CAUTION}\n",
        r.coverage.inside, r.coverage.compared
    );
    text
}
