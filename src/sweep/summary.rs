//! The summary of a whole sweep, one row per regimen, made from its state alone, so that a
//! merged state prints exactly what an unsharded run prints.

use super::state::{SweepState, SweptRegimen};
use crate::dosing::{Regimen, Route};
use crate::io::labels::percent;
use crate::io::output::{
    CAUTION, Column, CsvWriter, Format, column_decimals, fit_to_width, fixed, full, render_table, write_json,
};
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

/// One exposure's percentiles of a row (the table's columns are made per exposure).
type MetricOf = fn(&SummaryRow) -> &Percentiles;

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
                            "{what} above {limit} mg/L in {} of subjects, more than the acceptable risk of {}",
                            percent(p),
                            percent(l.max_risk)
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
    /// JSON with a `caution` field, or a table for reading within `width` characters when
    /// given (a terminal's), with the caution below.
    pub fn write(&self, out: &mut dyn Write, format: Format, width: Option<usize>) -> std::io::Result<()> {
        match format {
            Format::Csv => self.write_csv(out),
            Format::Json => write_json(out, self),
            Format::Table => {
                write!(out, "{}", fit_to_width(&format!("{}\n{CAUTION}\n", self.table(width)), width))
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

    fn table(&self, width: Option<usize>) -> String {
        let rs = &self.regimens;
        // One number of decimals per column, the same for a metric's median and its range.
        let decimals = |values: &mut dyn Iterator<Item = f64>, digits| column_decimals(values, digits);
        let regimen = |f: fn(&Regimen) -> f64| decimals(&mut rs.iter().map(|r| f(&r.regimen)), 3);
        let (amount, every, infusion) = (
            regimen(|r| r.amount_mg),
            regimen(|r| r.every_h),
            decimals(
                &mut rs.iter().filter(|r| r.regimen.route == Route::Infusion).map(|r| r.regimen.duration_h),
                3,
            ),
        );
        let metric =
            |p: MetricOf| decimals(&mut rs.iter().flat_map(|r| [p(r).p05, p(r).p50, p(r).p95]).flatten(), 3);
        let metrics: [(MetricOf, usize); 3] = [
            (|r| &r.trough_mg_l, metric(|r| &r.trough_mg_l)),
            (|r| &r.peak_mg_l, metric(|r| &r.peak_mg_l)),
            (|r| &r.auc24_mg_h_l, metric(|r| &r.auc24_mg_h_l)),
        ];
        let share = |x: Option<f64>| x.map(|p| fixed(100.0 * p, 1)).unwrap_or_else(|| "—".into());
        let rows: Vec<Vec<String>> = rs
            .iter()
            .map(|r| {
                let mut row = vec![
                    r.index.to_string(),
                    fixed(r.regimen.amount_mg, amount),
                    fixed(r.regimen.every_h, every),
                    if r.regimen.route == Route::Infusion {
                        fixed(r.regimen.duration_h, infusion)
                    } else {
                        r.regimen.route.to_string()
                    },
                    fixed(100.0 * r.pta, 1),
                    share(r.p_over_peak),
                    share(r.p_over_trough),
                ];
                for (p, d) in metrics {
                    let p = p(r);
                    let cell = |x: Option<f64>| x.map(|x| fixed(x, d)).unwrap_or_default();
                    row.push(cell(p.p50));
                    row.push(match (p.p05, p.p95) {
                        (Some(a), Some(b)) => format!("{}–{}", fixed(a, d), fixed(b, d)),
                        _ => String::new(),
                    });
                }
                let broken = !(r.dose_limits_broken.is_empty() && r.exposure_limits_broken.is_empty());
                row.push(if broken { "broken".into() } else { String::new() });
                row
            })
            .collect();
        let columns = [
            Column::number("#"),
            Column::number("dose\n(mg)"),
            Column::number("every\n(h)"),
            Column::number("infusion\n(h)"),
            Column::number("PTA\n(%)"),
            Column::number("peak over\nlimit (%)").optional(2),
            Column::number("trough over\nlimit (%)").optional(2),
            Column::number("trough\n(mg/L)"),
            Column::number("trough\n5–95 %").optional(3),
            Column::number("peak\n(mg/L)").optional(1),
            Column::number("peak\n5–95 %").optional(3),
            Column::number("AUC24\n(mg·h/L)"),
            Column::number("AUC24\n5–95 %").optional(3),
            Column::text("limits"),
        ];
        let mut text =
            format!("{} subjects, seed {}; targets: {}\n", self.subjects, self.seed, self.targets.join(", "));
        text += &render_table(&columns, &rows, width);
        text += "Medians over the subjects, with their 5th to 95th percentiles; at steady state.\n";
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
