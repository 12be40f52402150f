//! `cistern nca`: non-compartmental analysis of a study's levels, per subject and dosing
//! interval, or the mean curve of a sparse design.

use super::args::{Notify, OutputArgs, choice, flag_value};
use super::study::AdppkArgs;
use cistern::error::Problems;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, io_failure, number_column, readable,
    render_table, write_json,
};
use cistern::nca::auc::AucRule;
use cistern::nca::compare::{Comparison, DISAGREEMENT_PCT, compare};
use cistern::nca::intervals::BlqRule;
use cistern::nca::lambda_z::read_times;
use cistern::nca::pp::{NcaFormat, PpLabels, write_pp};
use cistern::nca::sparse::{MeanCurve, mean_curve};
use cistern::nca::{IntervalNca, LambdaZChoice, NcaOptions, analyse};
use cistern::spec::Spec;
use cistern::units::Kind;
use cistern::workflow::plan::SavedFit;
use cistern::workflow::{Required, Study};
use cistern::{Error, InputError};
use clap::Args;
use serde::Serialize;
use std::path::PathBuf;

/// Exposure from the levels alone, without a model: Cmax, AUC, λz, half-life, CL, Vz per
/// subject and dosing interval; with --sparse, the mean curve's AUC with its standard error.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # the standard table: one row per subject and dosing interval with levels
  cistern nca --doses doses.csv --levels levels.csv

  # the terminal slope from the levels 8 h to 24 h after the dose, AUC 0-12 h, as JSON
  cistern nca --doses doses.csv --levels levels.csv --lambda-z-window 8h..24h \\
      --partial 0h..12h --format json

  # one level per subject (destructive sampling): the mean curve, Bailer's standard error
  cistern nca --doses doses.csv --levels levels.csv --sparse

  # an ADPPK dataset in, SDTM PP records out
  cistern nca --adppk adppk.csv --map amount_mg=AMT --format sdtm-pp --specimen PLASMA -o pp.csv

Times in --lambda-z-window and --partial are hours after each dose. A level at the dose time
is used as measured; without one, the first dose's level then is 0 after an oral dose or an
infusion and back-extrapolated after a bolus (--explain says which, and every level below the
limit counted as zero or left out, and how λz was chosen).")]
pub struct NcaArgs {
    /// Doses CSV (time_<unit>, amount_<unit>, route, optional subject and duration_<unit>)
    #[arg(long, value_name = "FILE", required_unless_present = "adppk")]
    doses: Option<String>,
    /// Levels CSV (time_<unit>, conc_<unit>, optional subject and lloq_<unit>)
    #[arg(long, value_name = "FILE", required_unless_present = "adppk")]
    levels: Option<String>,
    #[command(flatten)]
    adppk: AdppkArgs,
    /// The rule for the area between two levels
    #[arg(long, value_parser = choice::<AucRule>(), default_value = "linear-up-log-down")]
    auc_rule: AucRule,
    /// What becomes of a level below the quantification limit
    #[arg(long, value_parser = choice::<BlqRule>(), default_value = "zero-then-drop")]
    blq: BlqRule,
    /// The terminal slope from the measurable levels whose time after the dose lies in A..B
    /// (inclusive), e.g. 8h..24h [default: chosen by adjusted R²]
    #[arg(long, value_name = "A..B", allow_hyphen_values = true)]
    lambda_z_window: Option<String>,
    /// A CSV (time_<unit>, and subject) listing the levels of each listed subject's terminal
    /// line, by their times in the levels file; other subjects as without it
    #[arg(long, value_name = "FILE")]
    lambda_z_times: Option<String>,
    /// Also the AUC between two times after the dose, e.g. 0h..12h; repeatable
    #[arg(long, value_name = "A..B", allow_hyphen_values = true)]
    partial: Vec<String>,
    /// A sparse design (one or a few levels per subject): the mean curve across subjects, its
    /// AUC with Bailer's standard error and 95 % interval
    #[arg(long)]
    sparse: bool,
    /// A fit of the same study (`cistern fit --format json`): the NCA AUC and clearance of each
    /// interval beside the fitted curve's, subjects that differ by more than 20 % flagged
    #[arg(long, value_name = "FILE", conflicts_with = "sparse")]
    fit: Option<String>,
    /// Also write a plot of each subject and interval (levels on a log scale, the levels of λz
    /// and the terminal line) to FILE (SVG)
    #[arg(long, value_name = "FILE", conflicts_with = "sparse")]
    svg: Option<String>,
    /// Print every level counted as zero or left out, the level at each dose time and each
    /// choice of λz (on stderr)
    #[arg(long)]
    explain: bool,
    /// Output format [default: table on a terminal, csv when piped or from the -o extension];
    /// sdtm-pp writes SDTM PP records (CSV)
    #[arg(long, value_parser = choice::<NcaFormat>())]
    format: Option<NcaFormat>,
    /// STUDYID of the SDTM PP records [default: the ADPPK file's STUDYID]
    #[arg(long, value_name = "ID")]
    study_id: Option<String>,
    /// PPSPEC of the SDTM PP records, the specimen the levels were measured in (e.g. PLASMA)
    #[arg(long, value_name = "SPECIMEN")]
    specimen: Option<String>,
    /// Write the output to FILE (atomically; never over an input or another output; through
    /// a symbolic link to its target); `-` is stdout
    #[arg(short = 'o', long = "output", value_name = "FILE")]
    output_file: Option<String>,
    #[command(flatten)]
    notify: Notify,
}

/// `A..B` as two times, A ≥ 0, A < B.
fn window(flag: &str, text: &str) -> Result<(f64, f64), InputError> {
    let (a, b) = text
        .split_once("..")
        .ok_or_else(|| InputError::flag(flag, format!("expected A..B (two times), found '{text}'")))?;
    let (a, b) = (flag_value(flag, Kind::Time, a)?, flag_value(flag, Kind::Time, b)?);
    if a < 0.0 || a >= b {
        return Err(InputError::flag(
            flag,
            format!("expected 0 <= A < B (hours after the dose), found '{text}'"),
        ));
    }
    Ok((a, b))
}

/// The JSON output per subject.
#[derive(Serialize)]
struct NcaJson<'a> {
    auc_rule: String,
    blq_rule: String,
    subjects: &'a [IntervalNca],
    #[serde(skip_serializing_if = "Option::is_none")]
    fit_comparison: Option<&'a [Comparison]>,
}

/// The JSON output of a sparse design.
#[derive(Serialize)]
struct SparseJson<'a> {
    mean_curve: &'a MeanCurve,
    population_mean: &'static str,
}

/// What a sparse result is, stated with it.
const POPULATION_MEAN: &str = "the mean curve across subjects: a population mean, not any subject's values";

/// The labels of SDTM PP records: the flags over what the ADPPK file says.
fn pp_labels(args: &NcaArgs, study: &Study) -> Result<PpLabels, InputError> {
    let labels = study.labels.clone().unwrap_or_default();
    let specimen = args.specimen.clone().ok_or_else(|| {
        InputError::flag("--specimen", "SDTM PP records need the specimen (PPSPEC), e.g. --specimen PLASMA")
    })?;
    if let Some(s) = study.subjects.iter().find(|s| {
        s.id.as_ref().is_none_or(|id| args.study_id.is_none() && !labels.study_ids.contains_key(id))
    }) {
        return Err(match &s.id {
            None => InputError::flag(
                "--format",
                "SDTM PP records need subject identifiers (USUBJID): the levels have no subject column",
            ),
            Some(id) => InputError::flag(
                "--study-id",
                format!(
                    "SDTM PP records need STUDYID, and subject {id} has none in the file: give --study-id"
                ),
            ),
        });
    }
    let conc_unit = match &labels.conc_unit {
        Some(u) => (u.clone(), Kind::Concentration.factor(u).unwrap_or(1.0)),
        None => ("mg/L".to_string(), 1.0),
    };
    Ok(PpLabels {
        study_id: args.study_id.clone(),
        study_ids: labels.study_ids,
        specimen,
        analyte: labels.analyte.unwrap_or_default(),
        conc_unit,
    })
}

/// Run the command.
pub fn run(args: NcaArgs) -> Result<(), Error> {
    let pp = args.format == Some(NcaFormat::SdtmPp);
    let plain = args.format.map(|f| match f {
        NcaFormat::Table => Format::Table,
        NcaFormat::Json => Format::Json,
        NcaFormat::Csv | NcaFormat::SdtmPp => Format::Csv,
    });
    let output = OutputArgs { format: plain, output: args.output_file.clone(), notify: args.notify.clone() };
    if pp && args.sparse {
        return Err(InputError::flag(
            "--format",
            "sdtm-pp writes per-subject records; --sparse gives a mean curve",
        )
        .into());
    }
    let mut problems = Problems::new();
    let lambda_z = match &args.lambda_z_window {
        Some(t) => problems.take(window("--lambda-z-window", t)).map(|(a, b)| LambdaZChoice::Window(a, b)),
        None => Some(LambdaZChoice::Automatic),
    };
    let partials: Vec<Option<(f64, f64)>> =
        args.partial.iter().map(|t| problems.take(window("--partial", t))).collect();
    let mut spec = Spec::new();
    spec.inputs.doses.set("--doses", args.doses.as_ref().map(PathBuf::from));
    spec.inputs.levels.set("--levels", args.levels.as_ref().map(PathBuf::from));
    args.adppk.apply(&mut spec.inputs);
    let study = problems.take_all(Study::load(&spec.inputs, Required { model: false, levels: true }));
    let fit = match &args.fit {
        Some(path) => problems.take_all(SavedFit::read(path)).map(Some),
        None => Some(None),
    };
    let listed = match &args.lambda_z_times {
        Some(path) => problems.take_all(read_times(path).map_err(Into::into)),
        None => Some(Default::default()),
    };
    let (((study, lambda_z), fit), lambda_z_times) =
        problems.finish_with(study.zip(lambda_z).zip(fit).zip(listed))?;
    let pp_labels = if pp { Some(pp_labels(&args, &study)?) } else { None };
    let options = NcaOptions {
        auc_rule: args.auc_rule,
        blq: args.blq,
        lambda_z,
        partials: partials.into_iter().flatten().collect(),
        lambda_z_times,
    };
    output.notify.notices(&study.notices);
    let sparse = if args.sparse {
        Some(mean_curve(&study.subjects, args.blq).map_err(|m| InputError::flag("--sparse", m))?)
    } else {
        None
    };
    let mut inputs = spec.files();
    inputs.extend(args.fit.iter().chain(&args.lambda_z_times).map(PathBuf::from));
    let mut files = RunFiles::new(inputs);
    let mut sink = output.sink(&mut files)?;
    let mut svg_sink =
        args.svg.as_deref().map(|p| files.open(cistern::Origin::Flag("--svg".into()), p)).transpose()?;
    let format = output.format();
    let width = output.table_width();
    let out = sink.writer();
    match &sparse {
        Some(curve) => {
            for n in &curve.notes {
                output.note(n);
            }
            match format {
                Format::Json => {
                    write_json(out, &SparseJson { mean_curve: curve, population_mean: POPULATION_MEAN })
                }
                Format::Csv => sparse_csv(out, curve),
                Format::Table => write!(out, "{}", fit_to_width(&sparse_table(curve, width), width)),
            }
            .map_err(io_failure)?;
        }
        None => {
            let results = analyse(&study.subjects, &options);
            if let Some(svg) = svg_sink.as_mut() {
                let panels: Vec<_> = results.iter().map(cistern::nca::plot::panel).collect();
                write!(svg.writer(), "{}", cistern::report::svg::render_svg(&panels, CAUTION))
                    .map_err(io_failure)?;
            }
            let comparisons = fit.as_ref().map(|fit| versus_fit(&study.subjects, &results, fit, &output));
            if args.explain {
                for r in &results {
                    for e in &r.explain {
                        eprintln!("explain: {}: {e}", who(r));
                    }
                }
            }
            for r in &results {
                for n in &r.notes {
                    match n.strip_prefix("warning: ") {
                        Some(w) => eprintln!("warning: {}: {}", who(r), super::printable(w)),
                        None => output.note(&format!("{}: {n}", who(r))),
                    }
                }
            }
            match (format, &pp_labels) {
                (_, Some(labels)) => write_pp(out, &results, options.auc_rule, labels),
                (Format::Json, None) => write_json(
                    out,
                    &NcaJson {
                        auc_rule: options.auc_rule.to_string(),
                        blq_rule: options.blq.to_string(),
                        subjects: &results,
                        fit_comparison: comparisons.as_deref(),
                    },
                ),
                (Format::Csv, None) => write_csv(out, &results, &options),
                (Format::Table, None) => {
                    let mut text = table(&results, width);
                    if let Some(c) = &comparisons {
                        text += &comparison_table(c, width);
                    }
                    write!(out, "{}", fit_to_width(&format!("{text}\n{CAUTION}\n"), width))
                }
            }
            .map_err(io_failure)?;
        }
    }
    output.caution_for_csv(format);
    sink.finish()?;
    svg_sink.map_or(Ok(()), |s| s.finish())
}

/// A row's subject and interval, for messages.
fn who(r: &IntervalNca) -> String {
    format!("{} interval {}", r.subject.as_deref().unwrap_or("subject"), r.interval)
}

/// The numeric columns of the per-interval outputs, in order: key and value.
type Getter = fn(&IntervalNca) -> Option<f64>;
const COLUMNS: &[(&str, Getter)] = &[
    ("dose_time_h", |r| Some(r.dose_time_h)),
    ("dose_mg", |r| Some(r.dose_mg)),
    ("tau_h", |r| r.tau_h),
    ("cmax_mg_l", |r| r.cmax_mg_l),
    ("tmax_h", |r| r.tmax_h),
    ("clast_mg_l", |r| r.clast_mg_l),
    ("tlast_h", |r| r.tlast_h),
    ("tfirst_h", |r| r.tfirst_h),
    ("auc_last_mg_h_l", |r| r.auc_last_mg_h_l),
    ("aumc_last_mg_h2_l", |r| r.aumc_last_mg_h2_l),
    ("lambda_z_per_h", |r| r.lambda_z_per_h),
    ("lambda_z_r2", |r| r.lambda_z_r2),
    ("lambda_z_adj_r2", |r| r.lambda_z_adj_r2),
    ("lambda_z_points", |r| r.lambda_z_points.map(|n| n as f64)),
    ("lambda_z_from_h", |r| r.lambda_z_from_h),
    ("lambda_z_to_h", |r| r.lambda_z_to_h),
    ("half_life_h", |r| r.half_life_h),
    ("auc_inf_obs_mg_h_l", |r| r.auc_inf_obs_mg_h_l),
    ("auc_inf_pred_mg_h_l", |r| r.auc_inf_pred_mg_h_l),
    ("auc_extrap_pct", |r| r.auc_extrap_pct),
    ("aumc_inf_obs_mg_h2_l", |r| r.aumc_inf_obs_mg_h2_l),
    ("mrt_h", |r| r.mrt_h),
    ("cl_l_h", |r| iv(r).and_then(|d| d.0)),
    ("cl_f_l_h", |r| oral(r).and_then(|d| d.0)),
    ("vz_l", |r| iv(r).and_then(|d| d.1)),
    ("vz_f_l", |r| oral(r).and_then(|d| d.1)),
    ("vss_l", |r| r.disposition.values().2),
    ("auc_tau_mg_h_l", |r| r.auc_tau_mg_h_l),
    ("cavg_mg_l", |r| r.cavg_mg_l),
    ("cmin_mg_l", |r| r.cmin_mg_l),
    ("ctrough_mg_l", |r| r.ctrough_mg_l),
    ("fluctuation_pct", |r| r.fluctuation_pct),
    ("swing_pct", |r| r.swing_pct),
    ("accumulation_ratio", |r| r.accumulation_ratio),
    ("cmax_per_dose_per_l", |r| r.cmax_per_dose_per_l),
    ("auc_last_per_dose_h_l", |r| r.auc_last_per_dose_h_l),
    ("auc_inf_obs_per_dose_h_l", |r| r.auc_inf_obs_per_dose_h_l),
];

/// Clearance and Vz of an intravenous dose.
fn iv(r: &IntervalNca) -> Option<(Option<f64>, Option<f64>)> {
    matches!(r.disposition, cistern::nca::Disposition::Intravenous { .. })
        .then(|| (r.disposition.values().0, r.disposition.values().1))
}

/// CL/F and Vz/F of an oral dose.
fn oral(r: &IntervalNca) -> Option<(Option<f64>, Option<f64>)> {
    matches!(r.disposition, cistern::nca::Disposition::Oral { .. })
        .then(|| (r.disposition.values().0, r.disposition.values().1))
}

/// One row per subject and interval: every number, the partial areas, the notes.
fn write_csv(
    out: &mut dyn std::io::Write,
    results: &[IntervalNca],
    options: &NcaOptions,
) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    let mut header: Vec<String> = vec!["subject".into(), "interval".into(), "route".into()];
    header.extend(COLUMNS.iter().map(|(k, _)| k.to_string()));
    for n in 1..=options.partials.len() {
        header.extend([
            format!("partial{n}_from_h"),
            format!("partial{n}_to_h"),
            format!("partial{n}_auc_mg_h_l"),
        ]);
    }
    header.push("notes".into());
    w.row(&header)?;
    for r in results {
        w.text(r.subject.as_deref().unwrap_or(""))?;
        w.integer(r.interval as u64)?;
        w.text(&r.route.to_string())?;
        for (_, get) in COLUMNS {
            match get(r) {
                Some(x) => w.number(x)?,
                None => w.text("")?,
            }
        }
        for p in &r.partial_aucs {
            w.number(p.from_h)?;
            w.number(p.to_h)?;
            match p.auc_mg_h_l {
                Some(x) => w.number(x)?,
                None => w.text("")?,
            }
        }
        w.text(&r.notes.join("; "))?;
        w.end_row()?;
    }
    w.finish().map(drop)
}

/// The terminal table: the standard columns, the least needed left out first on a narrow
/// terminal; the partial areas and notes below.
fn table(results: &[IntervalNca], width: Option<usize>) -> String {
    let several = results.iter().any(|r| r.interval > 1);
    let oral = results.iter().all(|r| matches!(r.disposition, cistern::nca::Disposition::Oral { .. }));
    // Short headers (the trade's symbols): eleven columns fit 80 characters only so; the
    // labels of io::labels are sentences for wider outputs. (key, header, drop rank, digits).
    let cl_key = if oral { "cl_f_l_h" } else { "cl_l_h" };
    let shown: [(&str, &str, u8, usize); 9] = [
        ("cmax_mg_l", "Cmax\n(mg/L)", 0, 4),
        ("tmax_h", "Tmax\n(h)", 2, 3),
        ("auc_last_mg_h_l", "AUClast\n(mg·h/L)", 0, 4),
        ("lambda_z_per_h", "λz\n(1/h)", 3, 3),
        ("half_life_h", "t½\n(h)", 0, 3),
        ("auc_inf_obs_mg_h_l", "AUC∞\n(mg·h/L)", 0, 4),
        ("auc_extrap_pct", "extrap.\n(%)", 1, 3),
        (cl_key, if oral { "CL/F\n(L/h)" } else { "CL\n(L/h)" }, 0, 3),
        ("auc_tau_mg_h_l", "AUCτ\n(mg·h/L)", 4, 4),
    ];
    let mut columns = vec![Column::text("subject")];
    if several {
        columns.push(Column::number("dose\nnumber"));
    }
    let mut cells: Vec<Vec<String>> = Vec::new();
    for &(key, header, rank, digits) in &shown {
        let get: Getter = COLUMNS.iter().find(|(k, _)| *k == key).map_or(|_| None, |c| c.1);
        // A mixed table (oral and intravenous) shows either clearance in the CL column.
        let values: Vec<Option<f64>> =
            results.iter().map(|r| if key == "cl_l_h" { r.disposition.values().0 } else { get(r) }).collect();
        columns.push(Column::number(header).optional(rank));
        cells.push(number_column(&values, digits));
    }
    let rows: Vec<Vec<String>> = results
        .iter()
        .enumerate()
        .map(|(i, r)| {
            let mut row = vec![r.subject.clone().unwrap_or_else(|| "—".into())];
            if several {
                row.push(r.interval.to_string());
            }
            row.extend(cells.iter().map(|c| c[i].clone()));
            row
        })
        .collect();
    let mut text = format!("Non-compartmental analysis, {} subject-interval(s)\n", results.len());
    text += &render_table(&columns, &rows, width);
    for r in results {
        for p in &r.partial_aucs {
            text += &format!(
                "{}: AUC {}–{} h: {}\n",
                who(r),
                readable(p.from_h, 6),
                readable(p.to_h, 6),
                p.auc_mg_h_l.map_or_else(
                    || "not covered by the levels".into(),
                    |x| format!("{} mg·h/L", readable(x, 4))
                )
            );
        }
    }
    if oral {
        text += "After oral doses clearance is CL/F (the bioavailability F is unknown).\n";
    }
    text += "--format csv or json has every number (AUMC, MRT, Vz, Vss, λz fit, steady-state metrics).\n";
    text
}

/// Each interval's NCA beside the fitted curve of its subject; a subject missing from the fit
/// is said so, and a disagreement above the margin is a warning.
fn versus_fit(
    subjects: &[cistern::fit::SubjectData],
    results: &[IntervalNca],
    fit: &SavedFit,
    output: &OutputArgs,
) -> Vec<Comparison> {
    let mut all = Vec::new();
    for s in subjects {
        let mine: Vec<IntervalNca> = results.iter().filter(|r| r.subject == s.id).cloned().collect();
        match fit.subjects.iter().find(|f| f.subject == s.id) {
            Some(f) => all.extend(compare(&mine, &f.parameters, &s.doses)),
            None => output.note(&format!(
                "{}: not in the fit, no comparison",
                s.id.as_deref().unwrap_or("the subject")
            )),
        }
    }
    for c in all.iter().filter(|c| c.disagree) {
        eprintln!(
            "warning: {} interval {}: NCA and the fit differ by more than {DISAGREEMENT_PCT} % (AUC {}, CL {})",
            c.subject.as_deref().unwrap_or("subject"),
            c.interval,
            c.auc_difference_pct.map_or_else(|| "—".into(), |d| format!("{d:+.1} %")),
            c.cl_difference_pct.map_or_else(|| "—".into(), |d| format!("{d:+.1} %")),
        );
    }
    all
}

/// The comparison with the fit as a table.
fn comparison_table(c: &[Comparison], width: Option<usize>) -> String {
    let column = |f: &dyn Fn(&Comparison) -> Option<f64>, digits| {
        number_column(&c.iter().map(f).collect::<Vec<_>>(), digits)
    };
    let cells = [
        column(&|c| c.nca_auc_last_mg_h_l, 4),
        column(&|c| c.fit_auc_last_mg_h_l, 4),
        column(&|c| c.auc_difference_pct, 3),
        column(&|c| c.nca_cl_l_h, 3),
        column(&|c| Some(c.fit_cl_l_h), 3),
        column(&|c| c.cl_difference_pct, 3),
    ];
    let rows: Vec<Vec<String>> = c
        .iter()
        .enumerate()
        .map(|(i, x)| {
            let mut row = vec![x.subject.clone().unwrap_or_else(|| "—".into()), x.interval.to_string()];
            row.extend(cells.iter().map(|col| col[i].clone()));
            row.push(if x.disagree { "DIFFERS".into() } else { String::new() });
            row
        })
        .collect();
    let columns = [
        Column::text("subject"),
        Column::number("dose\nnumber"),
        Column::number("AUClast NCA\n(mg·h/L)"),
        Column::number("AUClast fit\n(mg·h/L)"),
        Column::number("diff.\n(%)"),
        Column::number("CL NCA\n(L/h)"),
        Column::number("CL fit\n(L/h)"),
        Column::number("diff.\n(%)"),
        Column::text(""),
    ];
    let mut text = format!(
        "\nNCA beside the fit (CL/F after oral doses; DIFFERS: more than {DISAGREEMENT_PCT} % apart)\n"
    );
    text += &render_table(&columns, &rows, width);
    text
}

fn sparse_keys() -> [&'static str; 10] {
    [
        "subjects",
        "dose_mg",
        "auc_last_mg_h_l",
        "auc_last_se_mg_h_l",
        "auc_last_ci95_lo_mg_h_l",
        "auc_last_ci95_hi_mg_h_l",
        "cmax_mg_l",
        "cmax_se_mg_l",
        "tmax_h",
        "tlast_h",
    ]
}

/// The mean curve's summary in one CSV row.
fn sparse_csv(out: &mut dyn std::io::Write, c: &MeanCurve) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    w.row(sparse_keys())?;
    w.integer(c.subjects as u64)?;
    for x in [
        Some(c.dose_mg),
        Some(c.auc_last_mg_h_l),
        c.auc_last_se_mg_h_l,
        c.auc_last_ci95.map(|i| i[0]),
        c.auc_last_ci95.map(|i| i[1]),
        Some(c.cmax_mg_l),
        c.cmax_se_mg_l,
        Some(c.tmax_h),
        Some(c.tlast_h),
    ] {
        match x {
            Some(x) => w.number(x)?,
            None => w.text("")?,
        }
    }
    w.end_row()?;
    w.finish().map(drop)
}

/// The mean curve as a table, its AUC and peak with their intervals below.
fn sparse_table(c: &MeanCurve, width: Option<usize>) -> String {
    let times = number_column(&c.points.iter().map(|p| Some(p.time_h)).collect::<Vec<_>>(), 4);
    let means = number_column(&c.points.iter().map(|p| Some(p.mean_mg_l)).collect::<Vec<_>>(), 4);
    let sds = number_column(&c.points.iter().map(|p| p.sd_mg_l).collect::<Vec<_>>(), 3);
    let rows: Vec<Vec<String>> = (0..c.points.len())
        .map(|i| vec![times[i].clone(), c.points[i].levels.to_string(), means[i].clone(), sds[i].clone()])
        .collect();
    let columns = [
        Column::number("time after\nthe dose (h)"),
        Column::number("levels"),
        Column::number("mean\n(mg/L)"),
        Column::number("SD\n(mg/L)"),
    ];
    let interval = |x: Option<[f64; 2]>| {
        x.map_or_else(|| "—".to_string(), |[a, b]| format!("{}–{}", readable(a, 4), readable(b, 4)))
    };
    let mut text = format!("Mean curve of {} subjects ({POPULATION_MEAN})\n", c.subjects);
    text += &render_table(&columns, &rows, width);
    text += &format!(
        "AUC to {} h (linear trapezoids): {} mg·h/L, SE {} (Bailer 1988), 95 % interval {}\n",
        readable(c.tlast_h, 4),
        readable(c.auc_last_mg_h_l, 4),
        c.auc_last_se_mg_h_l.map_or_else(|| "—".into(), |s| readable(s, 3)),
        interval(c.auc_last_ci95)
    );
    text += &format!(
        "Cmax of the mean curve: {} mg/L at {} h, SE {}, 95 % interval {}\n",
        readable(c.cmax_mg_l, 4),
        readable(c.tmax_h, 4),
        c.cmax_se_mg_l.map_or_else(|| "—".into(), |s| readable(s, 3)),
        interval(c.cmax_ci95)
    );
    text += &format!("\n{CAUTION}\n");
    text
}
