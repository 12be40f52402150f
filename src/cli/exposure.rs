//! `cistern exposure`: steady-state metrics of a repeated regimen.

use super::args::{OutputArgs, ParamArgs, RegimenArgs, invalid_flag};
use cistern::Error;
use cistern::dosing::Regimen;
use cistern::engine::steady::{SteadyCurve, SteadyState};
use cistern::error::Problems;
use cistern::io::labels::label;
use cistern::io::output::{
    CAUTION, Column, CsvWriter, Format, RunFiles, fit_to_width, io_failure, readable, render_table,
    write_json,
};
use cistern::limits::reported_conc;
use clap::Args;
use serde::Serialize;
use serde::ser::{SerializeStruct, Serializer};

/// Steady-state peak, trough, AUC, average level, accumulation and loading dose of a regimen.
#[derive(Args, Debug)]
#[command(after_help = "\
Examples:
  # 1 g over 1 h every 12 h with CL 4.2 L/h and V 48 L
  cistern exposure --dose 1g --every 12h --route infusion --duration 1h --cl 4.2 --v 48

  # oral, with the rate constant instead of clearance, as JSON
  cistern exposure --dose 500mg --every 8h --route oral --ka 1.1 --f 0.8 --k 0.0875/h --v 48l --format json")]
pub struct ExposureArgs {
    #[command(flatten)]
    regimen: RegimenArgs,
    #[command(flatten)]
    params: ParamArgs,
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

/// The JSON output.
#[derive(Serialize)]
struct ExposureJson {
    parameters: ParametersJson,
    #[serde(serialize_with = "regimen_block")]
    regimen: Regimen,
    steady_state: SteadyState,
}

/// Run the command.
pub fn run(args: ExposureArgs) -> Result<(), Error> {
    let mut problems = Problems::new();
    let params = args.params.params(&mut problems);
    let schedule = args.regimen.schedule(&mut problems, Some(1));
    problems.finish()?;
    let (Some(params), Some(schedule)) = (params, schedule) else {
        return Err(Error::Usage("the arguments could not be read".into()));
    };
    let mut sink = args.output.sink(&mut RunFiles::default())?;
    let regimen = schedule.regimen;
    // Each flag's value was checked above; what is left is how they combine.
    let mut ss = SteadyCurve::new(&params, regimen).map_err(invalid_flag)?.metrics();
    for c in [&mut ss.exposure.peak_mg_l, &mut ss.exposure.trough_mg_l, &mut ss.exposure.cavg_mg_l] {
        *c = reported_conc(*c);
    }
    let k = params.k_per_h();
    let doc = ExposureJson {
        parameters: ParametersJson {
            cl_l_h: params.cl_l_h,
            v_l: params.v_l,
            k_per_h: k,
            half_life_h: params.half_life_h(),
            time_constant_h: 1.0 / k,
            steady_state_gain_h_l: 1.0 / params.cl_l_h,
            ka_per_h: params.ka_per_h,
            f: params.f,
            tlag_h: params.tlag_h,
        },
        regimen,
        steady_state: ss,
    };
    let format = args.output.format();
    let out = sink.writer();
    match format {
        Format::Json => write_json(out, &doc).map_err(io_failure)?,
        Format::Csv => {
            let rows = rows(&doc);
            let mut w = CsvWriter::new(out);
            w.row(rows.iter().map(|r| r.0)).map_err(io_failure)?;
            for r in &rows {
                w.number(r.1).map_err(io_failure)?;
            }
            w.end_row().map_err(io_failure)?;
            w.finish().map_err(io_failure)?;
        }
        Format::Table => {
            // Each row is its own quantity and unit: five significant digits each.
            let table: Vec<Vec<String>> = rows(&doc)
                .into_iter()
                .map(|(key, value)| vec![label(key).to_string(), readable(value, 5), key.to_string()])
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

/// Every number of the output as (key, value), in a fixed order; tables label the keys with
/// [`label`].
fn rows(doc: &ExposureJson) -> Vec<(&'static str, f64)> {
    let p = &doc.parameters;
    let (s, e) = (&doc.steady_state, &doc.steady_state.exposure);
    let mut rows = vec![
        ("cl_l_h", p.cl_l_h),
        ("v_l", p.v_l),
        ("k_per_h", p.k_per_h),
        ("half_life_h", p.half_life_h),
        ("time_constant_h", p.time_constant_h),
        ("steady_state_gain_h_l", p.steady_state_gain_h_l),
    ];
    if let Some(ka) = p.ka_per_h {
        rows.push(("ka_per_h", ka));
    }
    rows.extend([
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
    ]);
    rows
}
