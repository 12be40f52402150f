//! NCA results as SDTM PP records (CDISC's pharmacokinetic parameters domain), written as CSV:
//! one row per subject, dosing interval and parameter.
//!
//! Only the parameter codes and names checked against the standard's own examples are written
//! (docs/formats.md, "SDTM PP"); our other results (AUClast, λz itself, MRT, Cavg, …) stay in
//! our own formats until their codes are verified. A value the levels do not give is left out.
//! `PPORRES` is in the study's concentration unit (ADPPK `AVALU`) for concentrations and
//! areas, `PPSTRESN` in our base units (mg/L, h·mg/L); times, clearances and volumes are in
//! h, L/h and L in both.

use super::auc::AucRule;
use super::{Disposition, IntervalNca};
use crate::choice::choice_enum;
use crate::io::output::{CsvWriter, full, plain};
use std::collections::HashMap;
use std::io::Write;

choice_enum! {
    /// How `nca` prints its results.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum NcaFormat: "format" {
        /// Aligned columns for reading (the caution is printed below).
        Table = "table",
        /// Pure data for any CSV reader (the caution goes to stderr).
        Csv = "csv",
        /// One JSON document with a `caution` field.
        Json = "json",
        /// SDTM PP records (CDISC) as CSV, one row per subject, interval and parameter.
        SdtmPp = "sdtm-pp",
    }
}

/// The labels of the records that the results do not hold.
#[derive(Debug, Clone, PartialEq)]
pub struct PpLabels {
    /// `STUDYID` given for all subjects (`--study-id`), over the file's.
    pub study_id: Option<String>,
    /// `STUDYID` per subject, from the ADPPK file.
    pub study_ids: HashMap<String, String>,
    /// `PPSPEC` (e.g. `PLASMA`).
    pub specimen: String,
    /// `PPCAT`: the analyte (ADPPK `PARAMCD`), empty when not known.
    pub analyte: String,
    /// The study's concentration unit as written (`ng/mL`) and its factor to mg/L.
    pub conc_unit: (String, f64),
}

impl PpLabels {
    /// The `STUDYID` of a subject: the one given for all, else the file's.
    pub fn study_of(&self, subject: &str) -> Option<&str> {
        self.study_id.as_deref().or_else(|| self.study_ids.get(subject).map(String::as_str))
    }
}

/// The PP variables, in order.
pub const VARIABLES: [&str; 17] = [
    "STUDYID", "DOMAIN", "USUBJID", "PPSEQ", "PPGRPID", "PPTESTCD", "PPTEST", "PPCAT", "PPORRES", "PPORRESU",
    "PPSTRESC", "PPSTRESN", "PPSTRESU", "PPSPEC", "PPANMETH", "PPSTINT", "PPENINT",
];

/// What a parameter measures, for its units.
#[derive(Clone, Copy)]
enum Measure {
    Conc,
    Auc,
    Time,
    Clearance,
    Volume,
    Percent,
    /// A number without a unit (R²).
    Number,
    /// A whole number without a unit (levels on the terminal line).
    Count,
}

/// A parameter: code, name, what it measures, whether the AUC rule made it, and its value.
type Parameter = (&'static str, &'static str, Measure, bool, fn(&IntervalNca) -> Option<f64>);

/// The parameters written, in order (codes and names as in the standard's examples).
const PARAMETERS: &[Parameter] = &[
    ("CMAX", "Max Conc", Measure::Conc, false, |r| r.cmax_mg_l),
    ("TMAX", "Time of CMAX", Measure::Time, false, |r| r.tmax_h),
    ("AUCIFO", "AUC Infinity Obs", Measure::Auc, true, |r| r.auc_inf_obs_mg_h_l),
    ("AUCIFP", "AUC Infinity Pred", Measure::Auc, true, |r| r.auc_inf_pred_mg_h_l),
    ("AUCPEO", "AUC %Extrapolation Obs", Measure::Percent, true, |r| r.auc_extrap_pct),
    ("AUCTAU", "AUC Over Dosing Interval", Measure::Auc, true, |r| r.auc_tau_mg_h_l),
    ("LAMZHL", "Half-Life Lambda z", Measure::Time, false, |r| r.half_life_h),
    ("LAMZNPT", "Number of Points for Lambda z", Measure::Count, false, |r| {
        r.lambda_z_points.map(|n| n as f64)
    }),
    ("LAMZLL", "Lambda z Lower Limit", Measure::Time, false, |r| r.lambda_z_from_h),
    ("LAMZUL", "Lambda z Upper Limit", Measure::Time, false, |r| r.lambda_z_to_h),
    ("R2", "R Squared", Measure::Number, false, |r| r.lambda_z_r2),
    ("R2ADJ", "R Squared Adjusted", Measure::Number, false, |r| r.lambda_z_adj_r2),
    ("CLO", "Total CL Obs", Measure::Clearance, true, |r| intravenous(r).0),
    ("CLFO", "Total CL Obs by F", Measure::Clearance, true, |r| oral(r).0),
    ("VZO", "Vz Obs", Measure::Volume, true, |r| intravenous(r).1),
    ("VZFO", "Vz Obs by F", Measure::Volume, true, |r| oral(r).1),
];

/// CL and Vz after an intravenous dose.
fn intravenous(r: &IntervalNca) -> (Option<f64>, Option<f64>) {
    match r.disposition {
        Disposition::Intravenous { cl_l_h, vz_l, .. } => (cl_l_h, vz_l),
        Disposition::Oral { .. } => (None, None),
    }
}

/// CL/F and Vz/F after an oral dose.
fn oral(r: &IntervalNca) -> (Option<f64>, Option<f64>) {
    match r.disposition {
        Disposition::Oral { cl_f_l_h, vz_f_l } => (cl_f_l_h, vz_f_l),
        Disposition::Intravenous { .. } => (None, None),
    }
}

/// The name of an AUC rule in `PPANMETH`. `LIN-LOG TRAPEZOIDAL METHOD` is the standard's own
/// example; the other two follow its pattern in our words.
pub fn method_name(rule: AucRule) -> &'static str {
    match rule {
        AucRule::LinearLog => "LIN-LOG TRAPEZOIDAL METHOD",
        AucRule::LinearUpLogDown => "LINEAR-UP LOG-DOWN TRAPEZOIDAL METHOD",
        AucRule::Linear => "LINEAR TRAPEZOIDAL METHOD",
    }
}

/// An ISO 8601 duration of `hours` (`PT0H`, `PT12H`, `PT0.5H`).
fn duration(hours: f64) -> String {
    format!("PT{}H", plain(hours))
}

/// Write the records of `results`. Every result needs its subject (`USUBJID`).
pub fn write_pp(
    out: &mut dyn Write,
    results: &[IntervalNca],
    rule: AucRule,
    labels: &PpLabels,
) -> std::io::Result<()> {
    let mut w = CsvWriter::new(out);
    w.row(VARIABLES)?;
    let (unit, factor) = (&labels.conc_unit.0, labels.conc_unit.1);
    let mut seq: HashMap<&str, u64> = HashMap::new();
    for r in results {
        let subject = r.subject.as_deref().unwrap_or("");
        let study = labels.study_of(subject).unwrap_or("").to_string();
        let mut record = |code: &str,
                          name: &str,
                          measure: Measure,
                          by_rule: bool,
                          x: f64,
                          span: Option<(f64, f64)>| {
            let (original, original_unit, standard_unit) = match measure {
                Measure::Conc => (x / factor, unit.clone(), "mg/L"),
                Measure::Auc => (x / factor, format!("h*{unit}"), "h*mg/L"),
                Measure::Time => (x, "h".into(), "h"),
                Measure::Clearance => (x, "L/h".into(), "L/h"),
                Measure::Volume => (x, "L".into(), "L"),
                Measure::Percent => (x, "%".into(), "%"),
                Measure::Number | Measure::Count => (x, String::new(), ""),
            };
            // Whole numbers as such (`3` levels, not `3.0`), other numbers in full precision.
            let text = |v: f64| if matches!(measure, Measure::Count) { format!("{v:.0}") } else { full(v) };
            let n = seq.entry(subject).or_insert(0);
            *n += 1;
            let (from, to) = span.map_or((String::new(), String::new()), |(a, b)| (duration(a), duration(b)));
            let fields = [
                study.clone(),
                "PP".into(),
                subject.into(),
                n.to_string(),
                r.interval.to_string(),
                code.into(),
                name.into(),
                labels.analyte.clone(),
                text(original),
                original_unit,
                text(x),
            ];
            for f in &fields {
                w.text(f)?;
            }
            w.text(&text(x))?;
            for f in
                [standard_unit, &labels.specimen, if by_rule { method_name(rule) } else { "" }, &from, &to]
            {
                w.text(f)?;
            }
            w.end_row()
        };
        for &(code, name, measure, by_rule, get) in PARAMETERS {
            if let Some(x) = get(r) {
                record(code, name, measure, by_rule, x, None)?;
            }
        }
        for p in &r.partial_aucs {
            if let Some(x) = p.auc_mg_h_l {
                record("AUCINT", "AUC from T1 to T2", Measure::Auc, true, x, Some((p.from_h, p.to_h)))?;
            }
        }
    }
    w.finish().map(drop)
}
