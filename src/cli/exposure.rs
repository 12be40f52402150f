//! `cistern exposure`: steady-state metrics of a repeated regimen, or the metrics of a single
//! dose.

use super::args::{Dosing, OutputArgs, ParamArgs, RegimenArgs, flag_value, invalid_flag};
use cistern::dosing::{Dose, Regimen, Route};
use cistern::engine::steady::{SingleDose, SteadyCurve, SteadyState};
use cistern::engine::{self, Params};
use cistern::error::Problems;
use cistern::io::labels::label;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, io_failure, plain, readable, render_table,
    write_json,
};
use cistern::limits::reported_conc;
use cistern::units::Kind;
use cistern::{Error, InputError};
use clap::Args;
use serde::Serialize;
use serde::ser::{SerializeStruct, Serializer};

/// Steady-state peak, trough, AUC, average level, accumulation and loading dose of a regimen;
/// without --every, Cmax, Tmax and AUC to infinity of a single dose.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # one 1 g dose over 1 h: Cmax, Tmax, AUC to infinity, and the levels 2 h and 12 h after it
  cistern exposure --dose 1g --route infusion --duration 1h --cl 4 --v 40 --at 2h,12h

  # 1 g over 1 h every 12 h with CL 4.2 L/h and V 48 L
  cistern exposure --dose 1g --every 12h --route infusion --duration 1h --cl 4.2 --v 48

  # oral, with the rate constant instead of clearance, as JSON
  cistern exposure --dose 500mg --every 8h --route oral --ka 1.1 --f 0.8 --k 0.0875/h --v 48l --format json")]
pub struct ExposureArgs {
    #[command(flatten)]
    regimen: RegimenArgs,
    #[command(flatten)]
    params: ParamArgs,
    /// Single dose only: also the concentrations at these times after the dose, e.g. 2h,12h
    #[arg(long, value_name = "LIST", value_delimiter = ',', allow_hyphen_values = true)]
    at: Vec<String>,
    #[command(flatten)]
    output: OutputArgs,
}

/// The parameters block of the JSON output.
#[derive(Serialize)]
struct ParametersJson {
    cl_l_h: f64,
    v_l: f64,
    k_per_h: f64,
    half_life_h: f64,
    time_constant_h: f64,
    steady_state_gain_h_l: f64,
    ka_per_h: Option<f64>,
    f: f64,
    tlag_h: f64,
}

/// The regimen block in the order this output has always had: the route before the duration.
fn regimen_block<S: Serializer>(r: &Regimen, s: S) -> Result<S::Ok, S::Error> {
    let mut block = s.serialize_struct("Regimen", 4)?;
    block.serialize_field("amount_mg", &r.amount_mg)?;
    block.serialize_field("every_h", &r.every_h)?;
    block.serialize_field("route", &r.route)?;
    block.serialize_field("duration_h", &r.duration_h)?;
    block.end()
}

/// The JSON output of a repeated regimen.
#[derive(Serialize)]
struct ExposureJson {
    parameters: ParametersJson,
    #[serde(serialize_with = "regimen_block")]
    regimen: Regimen,
    steady_state: SteadyState,
}

/// A concentration at a time after a single dose.
#[derive(Serialize)]
struct LevelAt {
    time_h: f64,
    conc_mg_l: f64,
}

/// The single-dose block: the metrics and the concentrations asked for.
#[derive(Serialize)]
struct SingleDoseJson {
    #[serde(flatten)]
    metrics: SingleDose,
    at: Vec<LevelAt>,
}

/// The dose block of a single dose.
#[derive(Serialize)]
struct DoseJson {
    amount_mg: f64,
    route: Route,
    duration_h: f64,
}

/// The JSON output of a single dose.
#[derive(Serialize)]
struct SingleJson {
    parameters: ParametersJson,
    dose: DoseJson,
    single_dose: SingleDoseJson,
}

/// The JSON output: one of the two, as is.
#[derive(Serialize)]
#[serde(untagged)]
enum Doc {
    Repeated(ExposureJson),
    Single(SingleJson),
}

fn parameters_json(params: &Params) -> ParametersJson {
    let k = params.k_per_h();
    ParametersJson {
        cl_l_h: params.cl_l_h,
        v_l: params.v_l,
        k_per_h: k,
        half_life_h: params.half_life_h(),
        time_constant_h: 1.0 / k,
        steady_state_gain_h_l: 1.0 / params.cl_l_h,
        ka_per_h: params.ka_per_h,
        f: params.f,
        tlag_h: params.tlag_h,
    }
}

/// Run the command.
pub fn run(args: ExposureArgs) -> Result<(), Error> {
    let mut problems = Problems::new();
    let params = args.params.params(&mut problems);
    let dosing = args.regimen.dosing(&mut problems);
    let mut at = Vec::with_capacity(args.at.len());
    for t in &args.at {
        at.extend(problems.take(flag_value("--at", Kind::Time, t)));
    }
    if !args.at.is_empty() && matches!(dosing, Some(Dosing::Repeated { .. })) {
        problems.push(InputError::flag(
            "--at",
            "concentrations at given times are for a single dose (no --every)",
        ));
    }
    problems.finish()?;
    let (Some(params), Some(dosing)) = (params, dosing) else {
        return Err(Error::Usage("the arguments could not be read".into()));
    };
    let mut sink = args.output.sink(&mut RunFiles::default())?;
    // Each flag's value was checked above; what is left is how they combine.
    let (table_rows, doc) = match dosing {
        Dosing::Repeated { regimen, .. } => {
            let mut ss = SteadyCurve::new(&params, regimen).map_err(invalid_flag)?.metrics();
            for c in [&mut ss.exposure.peak_mg_l, &mut ss.exposure.trough_mg_l, &mut ss.exposure.cavg_mg_l] {
                *c = reported_conc(*c);
            }
            let doc = ExposureJson { parameters: parameters_json(&params), regimen, steady_state: ss };
            (rows(&doc.parameters, &steady_rows(&doc)), Doc::Repeated(doc))
        }
        Dosing::Single(dose) => {
            let mut metrics = SingleDose::new(&params, dose).map_err(invalid_flag)?;
            metrics.cmax_mg_l = reported_conc(metrics.cmax_mg_l);
            let at_zero = Dose { time_h: 0.0, ..dose };
            let levels = engine::concentrations(&params, &[at_zero], &at);
            let doc = SingleJson {
                parameters: parameters_json(&params),
                dose: DoseJson { amount_mg: dose.amount_mg, route: dose.route, duration_h: dose.duration_h },
                single_dose: SingleDoseJson {
                    metrics,
                    at: at
                        .iter()
                        .zip(levels)
                        .map(|(&time_h, c)| LevelAt { time_h, conc_mg_l: reported_conc(c) })
                        .collect(),
                },
            };
            (rows(&doc.parameters, &single_rows(&doc)), Doc::Single(doc))
        }
    };
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => write_json(out, &doc).map_err(io_failure)?,
        Format::Csv => {
            let mut w = CsvWriter::new(out);
            w.row(table_rows.iter().map(|r| r.0.as_str())).map_err(io_failure)?;
            for r in &table_rows {
                w.number(r.1).map_err(io_failure)?;
            }
            w.end_row().map_err(io_failure)?;
            w.finish().map_err(io_failure)?;
        }
        Format::Table => {
            let table: Vec<Vec<String>> = table_rows
                .into_iter()
                .map(|(name, value, label)| vec![label, readable(value, 5), name])
                .collect();
            let columns =
                [Column::text("quantity"), Column::number("value"), Column::text("key").optional(1)];
            let width = args.output.table_width();
            let text = format!("{}\n{CAUTION}\n", render_table(&columns, &table, width));
            write!(out, "{}", fit_to_width(&text, width)).map_err(io_failure)?;
        }
    }
    args.output.caution_for_csv(format);
    sink.finish()
}

/// One number of the output: (key, value, label for reading).
type Line = (String, f64, String);

/// The parameters' rows followed by `rest`.
fn rows(p: &ParametersJson, rest: &[Line]) -> Vec<Line> {
    let mut rows: Vec<Line> = [
        ("cl_l_h", p.cl_l_h),
        ("v_l", p.v_l),
        ("k_per_h", p.k_per_h),
        ("half_life_h", p.half_life_h),
        ("time_constant_h", p.time_constant_h),
        ("steady_state_gain_h_l", p.steady_state_gain_h_l),
    ]
    .into_iter()
    .chain(p.ka_per_h.map(|ka| ("ka_per_h", ka)))
    .map(|(k, v)| (k.to_string(), v, label(k).to_string()))
    .collect();
    rows.extend_from_slice(rest);
    rows
}

/// The single dose's numbers: the dose, Cmax, Tmax, AUC to infinity and each level asked for.
fn single_rows(doc: &SingleJson) -> Vec<Line> {
    let (d, m) = (&doc.dose, &doc.single_dose.metrics);
    let mut rows: Vec<Line> = [
        ("amount_mg", d.amount_mg),
        ("duration_h", d.duration_h),
        ("cmax_mg_l", m.cmax_mg_l),
        ("tmax_h", m.tmax_h),
        ("auc_inf_mg_h_l", m.auc_inf_mg_h_l),
    ]
    .into_iter()
    .map(|(k, v)| (k.to_string(), v, label(k).to_string()))
    .collect();
    for l in &doc.single_dose.at {
        rows.push((
            format!("conc_at_{}h_mg_l", plain(l.time_h)),
            l.conc_mg_l,
            format!("concentration {} h after the dose (mg/L)", plain(l.time_h)),
        ));
    }
    rows
}

/// The steady state's numbers, in a fixed order.
fn steady_rows(doc: &ExposureJson) -> Vec<Line> {
    let (s, e) = (&doc.steady_state, &doc.steady_state.exposure);
    [
        ("amount_mg", doc.regimen.amount_mg),
        ("every_h", doc.regimen.every_h),
        ("duration_h", doc.regimen.duration_h),
        ("peak_mg_l", e.peak_mg_l),
        ("peak_time_h", e.peak_time_h),
        ("trough_mg_l", e.trough_mg_l),
        ("auc_tau_mg_h_l", e.auc_tau_mg_h_l),
        ("auc24_mg_h_l", e.auc24_mg_h_l),
        ("cavg_mg_l", e.cavg_mg_l),
        ("accumulation_ratio", s.accumulation_ratio),
        ("fluctuation_pct", s.fluctuation_pct),
        ("time_to_90pct_h", s.time_to_90pct_h),
        ("time_to_95pct_h", s.time_to_95pct_h),
        ("loading_dose_mg", s.loading_dose_mg),
    ]
    .into_iter()
    .map(|(k, v)| (k.to_string(), v, label(k).to_string()))
    .collect()
}
