//! The summary of a whole sweep, one row per regimen, made from its state alone, so that a
//! merged state prints exactly what an unsharded run prints.

use super::state::{SweepState, SweptRegimen};
use crate::dosing::{Regimen, Route};
use crate::io::output::{CAUTION, CsvWriter, Format, full, readable, render_table, write_json};
use serde::Serialize;
use std::io::Write;

/// The 5th, 50th and 95th percentiles (nearest rank, within the sketch's relative error).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Percentiles {
    /// 5th percentile.
    pub p05: Option<f64>,
    /// Median.
    pub p50: Option<f64>,
    /// 95th percentile.
    pub p95: Option<f64>,
}

impl Percentiles {
    fn of(s: &super::sketch::Sketch) -> Percentiles {
        Percentiles { p05: s.percentile(5), p50: s.percentile(50), p95: s.percentile(95) }
    }

    fn cells(&self) -> [String; 3] {
        [self.p05, self.p50, self.p95].map(|x| x.map(full).unwrap_or_default())
    }
}

/// One regimen's results.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SummaryRow {
    /// 1-based position in the grid (the `regimen` column of the per-subject file).
    #[serde(rename = "regimen")]
    pub index: usize,
    /// The regimen.
    #[serde(flatten)]
    pub regimen: Regimen,
    /// Total over 24 h (mg).
    pub daily_mg: f64,
    /// Subjects.
    pub subjects: u64,
    /// Probability of target attainment: the share of subjects meeting every target.
    pub pta: f64,
    /// Share of subjects whose steady-state peak is above the limit (`None` without a limit).
    pub p_over_peak: Option<f64>,
    /// Share of subjects whose steady-state trough is above the limit.
    pub p_over_trough: Option<f64>,
    /// Dose limits the regimen breaks by itself.
    pub dose_limits_broken: Vec<String>,
    /// Exposure limits broken in more subjects than the acceptable risk allows.
    pub exposure_limits_broken: Vec<String>,
    /// Steady-state trough (mg/L).
    pub trough_mg_l: Percentiles,
    /// Steady-state peak (mg/L).
    pub peak_mg_l: Percentiles,
    /// Steady-state AUC over 24 h (mg·h/L).
    pub auc24_mg_h_l: Percentiles,
}

/// The summary of a whole sweep.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Summary {
    /// Subjects in the sweep.
    pub subjects: u64,
    /// The seed.
    pub seed: u64,
    /// The targets, as stated.
    pub targets: Vec<String>,
    /// Every percentile is within this relative error of the exact sample percentile.
    pub percentile_relative_error: f64,
    /// One row per regimen.
    pub regimens: Vec<SummaryRow>,
}

/// The summary CSV's columns.
pub const SUMMARY_HEADER: [&str; 21] = [
    "regimen",
    "amount_mg",
    "every_h",
    "duration_h",
    "route",
    "daily_mg",
    "subjects",
    "pta",
    "p_over_peak",
    "p_over_trough",
    "dose_limits_broken",
    "exposure_limits_broken",
    "trough_p05_mg_l",
    "trough_p50_mg_l",
    "trough_p95_mg_l",
    "peak_p05_mg_l",
    "peak_p50_mg_l",
    "peak_p95_mg_l",
    "auc24_p05_mg_h_l",
    "auc24_p50_mg_h_l",
    "auc24_p95_mg_h_l",
];

impl Summary {
    /// The summary of a whole sweep's state.
    pub fn of(state: &SweepState) -> Summary {
        let setup = &state.setup;
        let share = |n: u64, of: u64| n as f64 / of as f64;
        // An exposure limit is broken when more subjects than the acceptable risk exceed it.
        let exposure = |t: &super::state::Tally| {
            let l = &setup.limits;
            [("peak", t.over_peak, l.max_peak_mg_l), ("trough", t.over_trough, l.max_trough_mg_l)]
                .into_iter()
                .filter_map(|(what, over, limit)| {
                    let (p, limit) = (share(over?, t.subjects), limit?);
                    (p > l.max_risk).then(|| {
                        format!(
                            "{what} above {limit} mg/L in {:.1} % of subjects, more than the acceptable risk of {}",
                            100.0 * p,
                            l.max_risk
                        )
                    })
                })
                .collect()
        };
        let rows = state
            .setup
            .regimens
            .iter()
            .zip(&state.tallies)
            .enumerate()
            .map(|(i, (r, t)): (usize, (&SweptRegimen, _))| SummaryRow {
                index: i + 1,
                regimen: r.regimen,
                daily_mg: r.regimen.daily_mg(),
                subjects: t.subjects,
                pta: share(t.meets, t.subjects),
                p_over_peak: t.over_peak.map(|n| share(n, t.subjects)),
                p_over_trough: t.over_trough.map(|n| share(n, t.subjects)),
                dose_limits_broken: r.dose_limits_broken.clone(),
                exposure_limits_broken: exposure(t),
                trough_mg_l: Percentiles::of(&t.trough_mg_l),
                peak_mg_l: Percentiles::of(&t.peak_mg_l),
                auc24_mg_h_l: Percentiles::of(&t.auc24_mg_h_l),
            })
            .collect();
        Summary {
            subjects: state.setup.subjects,
            seed: state.setup.seed,
            targets: state.setup.targets.clone(),
            percentile_relative_error: state.setup.percentile_relative_error,
            regimens: rows,
        }
    }

    /// Print in `format`: CSV with full precision (the caller prints the caution on stderr),
    /// JSON with a `caution` field, or a table for reading with the caution below.
    pub fn write(&self, out: &mut dyn Write, format: Format) -> std::io::Result<()> {
        match format {
            Format::Csv => self.write_csv(out),
            Format::Json => write_json(out, self),
            Format::Table => {
                write!(out, "{}", self.table())?;
                writeln!(out, "\n{CAUTION}")
            }
        }
    }

    fn write_csv(&self, out: &mut dyn Write) -> std::io::Result<()> {
        let mut w = CsvWriter::new(out);
        w.row(SUMMARY_HEADER)?;
        let opt = |x: Option<f64>| x.map(full).unwrap_or_default();
        for r in &self.regimens {
            let mut row = vec![
                r.index.to_string(),
                full(r.regimen.amount_mg),
                full(r.regimen.every_h),
                full(r.regimen.duration_h),
                r.regimen.route.to_string(),
                full(r.daily_mg),
                r.subjects.to_string(),
                full(r.pta),
                opt(r.p_over_peak),
                opt(r.p_over_trough),
                r.dose_limits_broken.join("; "),
                r.exposure_limits_broken.join("; "),
            ];
            for p in [&r.trough_mg_l, &r.peak_mg_l, &r.auc24_mg_h_l] {
                row.extend(p.cells());
            }
            w.row(&row)?;
        }
        w.finish().map(drop)
    }

    fn table(&self) -> String {
        let range = |p: &Percentiles| match (p.p05, p.p50, p.p95) {
            (Some(a), Some(b), Some(c)) => {
                format!("{} ({}–{})", readable(b, 4), readable(a, 3), readable(c, 3))
            }
            _ => String::new(),
        };
        let share = |x: Option<f64>| x.map(|p| format!("{:.1}", 100.0 * p)).unwrap_or_else(|| "—".into());
        let rows: Vec<Vec<String>> = self
            .regimens
            .iter()
            .map(|r| {
                vec![
                    r.index.to_string(),
                    readable(r.regimen.amount_mg, 4),
                    readable(r.regimen.every_h, 4),
                    if r.regimen.route == Route::Infusion {
                        readable(r.regimen.duration_h, 3)
                    } else {
                        r.regimen.route.to_string()
                    },
                    format!("{:.1}", 100.0 * r.pta),
                    share(r.p_over_peak),
                    share(r.p_over_trough),
                    range(&r.trough_mg_l),
                    range(&r.peak_mg_l),
                    range(&r.auc24_mg_h_l),
                    if r.dose_limits_broken.is_empty() && r.exposure_limits_broken.is_empty() {
                        String::new()
                    } else {
                        "breaks limits".into()
                    },
                ]
            })
            .collect();
        let headers = [
            "regimen",
            "amount_mg",
            "every_h",
            "infusion_h",
            "pta_%",
            "over_peak_%",
            "over_trough_%",
            "trough_mg_l median (5–95 %)",
            "peak_mg_l median (5–95 %)",
            "auc24_mg_h_l median (5–95 %)",
            "limits",
        ];
        let mut text =
            format!("{} subjects, seed {}; targets: {}\n", self.subjects, self.seed, self.targets.join(", "));
        text += &render_table(&headers, &rows, &[]);
        for r in &self.regimens {
            for reason in r.dose_limits_broken.iter().chain(&r.exposure_limits_broken) {
                text += &format!("regimen {}: {reason}\n", r.index);
            }
        }
        text += &format!(
            "Percentiles are within {} % of the exact sample percentiles.\n",
            100.0 * self.percentile_relative_error
        );
        text
    }
}
