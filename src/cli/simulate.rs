//! `cistern simulate`: concentrations over a dose history at requested times, and the exact AUC.

use super::args::{OutputArgs, ParamArgs, RegimenArgs, flag_value, invalid_flag};
use cistern::dosing::{Dose, Route};
use cistern::engine::{self, Params};
use cistern::error::Problems;
use cistern::io::doses::{DoseFile, parse_doses};
use cistern::io::labels::label;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, full, io_failure, number_column, readable,
    render_table, write_json,
};
use cistern::io::table::Table;
use cistern::limits::auc_message;
use cistern::limits::{check_output_size, reported_conc};
use cistern::report::content::curve_times;
use cistern::report::layout::{DoseTick, PlotSpec, Series, Stroke};
use cistern::report::svg;
use cistern::units::Kind;
use cistern::{Error, InputError};
use clap::Args;
use serde::Serialize;

/// Concentrations over a dose history, with the exact AUC over the simulated span.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # one 1 g dose infused over 1 h; CL 4 L/h, V 40 L; times to five half-lives after it
  cistern simulate --dose 1g --route infusion --duration 1h --cl 4 --v 40

  # 1 g infused over 1 h every 12 h, 6 doses; CL 4.2 L/h, V 48 L; every 30 min for 3 days
  cistern simulate --dose 1g --route infusion --duration 1h --every 12h --count 6 \\
      --cl 4.2 --v 48 --times 0:72h:30min

  # a recorded dose history (CSV) at chosen times, as JSON
  cistern simulate --doses demo-regimens/doses.csv --cl 70ml/min --v 48l --ka 1.1 --f 0.8 --at 1,6,11.5 \\
      --format json

  # oral doses: absorption rate, bioavailability and lag time
  cistern simulate --dose 500mg --route oral --every 8h --count 9 --ka 1.1 --f 0.8 --tlag 20min \\
      --cl 4.2 --v 48 --times 0:72:0.25")]
pub struct SimulateArgs {
    /// Doses CSV (columns time_<unit>, amount_<unit>, route, duration_<unit>; optional subject,
    /// every_<unit> and count); instead of the regimen flags
    #[arg(long, value_name = "FILE")]
    doses: Option<String>,
    #[command(flatten)]
    regimen: RegimenArgs,
    #[command(flatten)]
    params: ParamArgs,
    /// Time grid START:END:STEP, e.g. 0:48h:15min (START + i·STEP up to END) [default: from
    /// the first dose to five half-lives after the last dose ends, about 100 points]
    #[arg(long, value_name = "GRID", conflicts_with = "at", allow_hyphen_values = true)]
    times: Option<String>,
    /// Explicit times, comma-separated, e.g. 0.5,1,2h,90min
    #[arg(long, value_name = "LIST", value_delimiter = ',', allow_hyphen_values = true)]
    at: Vec<String>,
    /// Also write the concentration curves as an SVG plot (linear and logarithmic panels)
    #[arg(long, value_name = "FILE.svg")]
    svg: Option<String>,
    /// Allow an output of more than 1,000,000 values (time points × subjects), up to
    /// 50,000,000
    #[arg(long)]
    allow_large: bool,
    #[command(flatten)]
    output: OutputArgs,
}

#[derive(Serialize)]
struct SubjectCurve<'a> {
    subject: Option<&'a str>,
    time_h: &'a [f64],
    conc_mg_l: &'a [f64],
    auc_from_h: f64,
    auc_to_h: f64,
    auc_mg_h_l: f64,
}

/// The JSON output.
#[derive(Serialize)]
struct SimulateJson<'a> {
    subjects: Vec<SubjectCurve<'a>>,
}

/// Parse `START:END:STEP` into the grid START + i·STEP, i = 0, 1, … up to END within rounding.
pub fn parse_grid(text: &str) -> Result<Vec<f64>, InputError> {
    let flag = "--times";
    let parts: Vec<&str> = text.split(':').collect();
    if parts.len() != 3 {
        return Err(InputError::flag(
            flag,
            format!("expected START:END:STEP, e.g. 0:48h:30min, found '{text}'"),
        ));
    }
    let start = flag_value(flag, Kind::Time, parts[0])?;
    let end = flag_value(flag, Kind::Time, parts[1])?;
    let step = flag_value(flag, Kind::Time, parts[2])?;
    if step <= 0.0 {
        return Err(InputError::flag(flag, format!("the STEP must be positive, found '{}'", parts[2])));
    }
    if end < start {
        return Err(InputError::flag(flag, format!("END ({end} h) is before START ({start} h)")));
    }
    // Include END when it lies on the grid up to rounding.
    let intervals = ((end - start) / step * (1.0 + 1e-12) + 1e-9).floor();
    // Checked before anything is allocated: the grid alone may not exceed the hard bound.
    // (`as` saturates: a grid beyond u64 is refused like any other too large.)
    let points = (intervals as u64).saturating_add(1);
    check_output_size(points, true).map_err(|m| InputError::flag(flag, m))?;
    Ok((0..points).map(|i| start + i as f64 * step).collect())
}

/// The times asked for, or `None` for the default grid (not an error).
fn times_of(args: &SimulateArgs, problems: &mut Problems) -> Option<Option<Vec<f64>>> {
    match (&args.times, args.at.is_empty()) {
        (Some(grid), _) => problems.take(parse_grid(grid)).map(Some),
        (None, false) => {
            let mut out = Vec::with_capacity(args.at.len());
            for t in &args.at {
                out.push(problems.take(flag_value("--at", Kind::Time, t))?);
            }
            Some(Some(out))
        }
        (None, true) => Some(None),
    }
}

/// Points of the default time grid, about.
const DEFAULT_POINTS: f64 = 100.0;

/// The default time grid: from the first dose to five half-lives after the end of the last
/// (the half-life of the slower of elimination and absorption when a dose is oral: about 97 %
/// of the last dose is then eliminated), in a round step (1, 2, 2.5 or 5 × 10ⁿ h) giving at most 100 intervals; with
/// its description for the note.
fn default_grid(params: &Params, subjects: &[(Option<String>, Vec<Dose>)]) -> (Vec<f64>, String) {
    let doses = || subjects.iter().flat_map(|(_, d)| d);
    let first = doses().map(|d| d.time_h).fold(f64::INFINITY, f64::min);
    let last_end = doses().map(|d| d.time_h + d.duration_h).fold(f64::NEG_INFINITY, f64::max);
    let oral = doses().any(|d| d.route == Route::Oral);
    let half_life = params.terminal_half_life_h(oral);
    let (first, last_end) = if first.is_finite() { (first, last_end) } else { (0.0, 0.0) };
    let lag = if oral { params.tlag_h } else { 0.0 };
    let end = last_end + lag + 5.0 * half_life;
    let step = cistern::units::round_step((end - first) / DEFAULT_POINTS);
    let n = ((end - first) / step).ceil() as u64;
    let times = (0..=n).map(|i| first + i as f64 * step).collect::<Vec<_>>();
    let to = times.last().copied().unwrap_or(first);
    let what = format!(
        "times {first} h to {to} h every {step} h: five half-lives ({} h) after the last dose ends; \
         choose others with --times or --at",
        readable(half_life, 4)
    );
    (times, what)
}

fn histories(args: &SimulateArgs, problems: &mut Problems) -> Option<DoseFile> {
    match (&args.doses, args.regimen.given()) {
        (Some(_), true) => {
            problems
                .push(InputError::flag("--doses", "give either a doses file or the regimen flags, not both"));
            None
        }
        (Some(path), false) => {
            let table = Table::read(path).map_err(|e| e.into_iter().for_each(|e| problems.push(e))).ok()?;
            let file = parse_doses(&table).map_err(|e| e.into_iter().for_each(|e| problems.push(e))).ok()?;
            Some(file)
        }
        (None, _) => {
            let doses = args.regimen.history(problems)?;
            Some(DoseFile { subjects: vec![(None, doses)], notices: Default::default() })
        }
    }
}

/// Run the command.
pub fn run(args: SimulateArgs) -> Result<(), Error> {
    let mut problems = Problems::new();
    let params = args.params.params(&mut problems);
    let times = times_of(&args, &mut problems);
    let subjects = histories(&args, &mut problems);
    problems.finish()?;
    let (Some(params), Some(times), Some(DoseFile { subjects, notices })) = (params, times, subjects) else {
        return Err(Error::Usage("the arguments could not be read".into()));
    };
    for (who, doses) in &subjects {
        params.validate(doses).map_err(|invalid| {
            let mut e = invalid_flag(invalid);
            if let Some(s) = who {
                e.message = format!("subject {s}: {}", e.message);
            }
            Error::from(e)
        })?;
    }
    args.output.notify.notices(&notices);
    let times = times.unwrap_or_else(|| {
        let (times, what) = default_grid(&params, &subjects);
        args.output.note(&what);
        times
    });
    let values = (times.len() as u64).saturating_mul(subjects.len() as u64);
    check_output_size(values, args.allow_large).map_err(|m| {
        let flag = if args.times.is_some() { "--times" } else { "--at" };
        Error::from(InputError::flag(
            flag,
            format!("{m} ({} times × {} subjects)", times.len(), subjects.len()),
        ))
    })?;
    // Both outputs are opened before the work, so a bad path fails first.
    let mut files = RunFiles::new(&args.doses);
    let mut sink = args.output.sink(&mut files)?;
    let svg_sink = files.open_flag("--svg", args.svg.as_deref())?;
    let (t_lo, t_hi) =
        times.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &t| (lo.min(t), hi.max(t)));
    // Long work shows progress on a terminal: a bar over the subjects computed, then over the
    // rows written (what takes the time in a large CSV).
    let long = values >= PROGRESS_FROM;
    let bar = if long {
        args.output.progress_bar(subjects.len() as u64, "subjects computed")
    } else {
        indicatif::ProgressBar::hidden()
    };
    let curves: Vec<(Vec<f64>, f64)> = subjects
        .iter()
        .map(|(_, doses)| {
            let conc = engine::concentrations(&params, doses, &times);
            bar.inc(1);
            (conc.into_iter().map(reported_conc).collect(), engine::auc(&params, doses, t_lo, t_hi))
        })
        .collect();
    bar.finish_and_clear();
    let bar = if long {
        args.output.progress_bar(values, "rows written")
    } else {
        indicatif::ProgressBar::hidden()
    };

    let format = args.output.format();
    let out = sink.writer();
    let with_subject = subjects.iter().any(|(s, _)| s.is_some());
    match format {
        Format::Json => {
            let doc = SimulateJson {
                subjects: subjects
                    .iter()
                    .zip(&curves)
                    .map(|((who, _), (conc, auc))| SubjectCurve {
                        subject: who.as_deref(),
                        time_h: &times,
                        conc_mg_l: conc,
                        auc_from_h: t_lo,
                        auc_to_h: t_hi,
                        auc_mg_h_l: *auc,
                    })
                    .collect(),
            };
            write_json(out, &doc).map_err(io_failure)?;
        }
        Format::Csv => {
            write_csv(out, &subjects, &times, &curves, with_subject, &bar).map_err(io_failure)?;
            bar.finish_and_clear();
            for ((who, _), (_, auc)) in subjects.iter().zip(&curves) {
                let name = who.as_deref().map(|s| format!("subject {s}: ")).unwrap_or_default();
                let auc = auc_message(*auc, full);
                args.output.note(&format!("{name}AUC from {t_lo} h to {t_hi} h = {auc} mg·h/L"));
            }
        }
        Format::Table => {
            let mut columns = vec![Column::number(label("time_h")), Column::number(label("conc_mg_l"))];
            if with_subject {
                columns.insert(0, Column::text("subject"));
            }
            // One number of decimals per column, over every subject.
            let all_times: Vec<Option<f64>> =
                curves.iter().flat_map(|_| times.iter().map(|t| Some(*t))).collect();
            let all_conc: Vec<Option<f64>> =
                curves.iter().flat_map(|(c, _)| c.iter().map(|c| Some(*c))).collect();
            let (time_cells, conc_cells) = (number_column(&all_times, 6), number_column(&all_conc, 4));
            let who = subjects
                .iter()
                .flat_map(|(who, _)| times.iter().map(move |_| who.clone().unwrap_or_default()));
            let rows: Vec<Vec<String>> = who
                .zip(time_cells.into_iter().zip(conc_cells))
                .map(|(who, (t, c))| if with_subject { vec![who, t, c] } else { vec![t, c] })
                .collect();
            let width = args.output.table_width();
            let mut text = render_table(&columns, &rows, width);
            text.push('\n');
            for ((who, _), (_, auc)) in subjects.iter().zip(&curves) {
                let name = who.as_deref().map(|s| format!("subject {s}: ")).unwrap_or_default();
                let auc = auc_message(*auc, |a| readable(a, 5));
                text += &format!("{name}AUC {t_lo}–{t_hi} h = {auc} mg·h/L (exact integral)\n");
            }
            text += &format!("\n{CAUTION}\n");
            write!(out, "{}", fit_to_width(&text, width)).map_err(io_failure)?;
        }
    }
    args.output.caution_for_csv(format);
    if let Some(mut plot) = svg_sink {
        let panels = curve_plots(&params, &subjects, (t_lo, t_hi));
        plot.writer().write_all(svg::render_svg(&panels, CAUTION).as_bytes()).map_err(io_failure)?;
        plot.finish()?;
    }
    sink.finish()
}

/// The curves as CSV: one row per subject and time.
fn write_csv(
    out: &mut dyn std::io::Write,
    subjects: &[(Option<String>, Vec<Dose>)],
    times: &[f64],
    curves: &[(Vec<f64>, f64)],
    with_subject: bool,
    progress: &indicatif::ProgressBar,
) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    let header = ["subject", "time_h", "conc_mg_l"];
    w.row(&header[usize::from(!with_subject)..])?;
    for ((who, _), (conc, _)) in subjects.iter().zip(curves) {
        for (i, (t, c)) in times.iter().zip(conc).enumerate() {
            // The bar moves in steps, so a row costs no more than a counter.
            if i % 65_536 == 0 {
                progress.inc(65_536.min((times.len() - i) as u64));
            }
            if with_subject {
                w.text(who.as_deref().unwrap_or(""))?;
            }
            w.number(*t)?;
            w.number(*c)?;
            w.end_row()?;
        }
    }
    w.finish().map(drop)
}

/// Outputs of at least this many values (times × subjects) show progress on a terminal.
const PROGRESS_FROM: u64 = 1_000_000;

/// The simulated curves as plot panels, linear and logarithmic, one line per subject, each
/// the exact curve ([`curve_times`]) with its doses ticked in its colour.
fn curve_plots(params: &Params, subjects: &[(Option<String>, Vec<Dose>)], span: (f64, f64)) -> Vec<PlotSpec> {
    const COLORS: [(f32, f32, f32); 6] = [
        (0.12, 0.35, 0.65),
        (0.80, 0.40, 0.10),
        (0.20, 0.55, 0.25),
        (0.55, 0.25, 0.60),
        (0.65, 0.15, 0.15),
        (0.3, 0.3, 0.3),
    ];
    let series: Vec<Series> = subjects
        .iter()
        .enumerate()
        .map(|(i, (who, doses))| {
            let xs = curve_times(params, doses, span);
            Series {
                label: who.clone().unwrap_or_else(|| "concentration".into()),
                ys: engine::concentrations(params, doses, &xs),
                xs,
                stroke: Stroke::Solid,
                color: COLORS[i % COLORS.len()],
            }
        })
        .collect();
    let doses: Vec<DoseTick> = subjects
        .iter()
        .zip(&series)
        .flat_map(|((_, doses), s)| doses.iter().map(|d| DoseTick { x: d.time_h, color: s.color }))
        .collect();
    [false, true]
        .into_iter()
        .map(|log_y| PlotSpec {
            title: if log_y {
                "Concentration, logarithmic scale".into()
            } else {
                "Concentration, linear scale".into()
            },
            x_label: "time (h)".into(),
            y_label: "concentration (mg/L)".into(),
            log_y,
            bands: Vec::new(),
            target: None,
            series: series.clone(),
            hlines: Vec::new(),
            markers: Vec::new(),
            markers_label: String::new(),
            doses: doses.clone(),
            start_x: None,
        })
        .collect()
}
