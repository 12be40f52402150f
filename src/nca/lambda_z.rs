//! The terminal rate constant λz: the negative slope of the least-squares line through ln C
//! against t over the last levels of a profile.
//!
//! Automatic choice (common practice, no source — no textbook or regulatory source was found
//! for it): among the lines through the last 3, 4, … levels after the peak (the peak itself
//! counts after an intravenous bolus, where the decline starts at it), keep those with a
//! negative slope; take the best adjusted R², and of the lines within [`ADJ_R2_TOLERANCE`] of
//! it the one with the most levels. Adjusted R² = 1 − (1 − R²)(n − 1)/(n − 2).
//!
//! A window (`--lambda-z-window A..B`) takes instead every measurable level whose time after
//! the dose lies in [A, B]. Either way at least three levels are needed, and a line that does
//! not fall gives no λz.

use crate::error::InputError;
use crate::io::table::Table;
use crate::nca::auc::Sample;
use crate::units::Kind;
use serde::Serialize;
use std::collections::HashMap;

/// The levels chosen for each subject's terminal line (`--lambda-z-times FILE`): their times on
/// the levels file's clock, by subject (`None` for a file without a subject column).
pub type ChosenTimes = HashMap<Option<String>, Vec<f64>>;

/// Read a CSV of `time_<unit>` (and `subject`) naming the levels of each subject's terminal
/// line, every problem located.
pub fn read_times(path: &str) -> Result<ChosenTimes, Vec<InputError>> {
    parse_times(&Table::read(path)?)
}

/// [`read_times`] of a table already read (`cistern check` tells the file's kind first).
pub fn parse_times(table: &Table) -> Result<ChosenTimes, Vec<InputError>> {
    let path = table.source.as_str();
    let time = table.unit_column("time", Kind::Time).map_err(|e| vec![e])?.ok_or_else(|| {
        vec![InputError::in_file(path, "expected a time column (e.g. time_h)").at_line(table.header_line)]
    })?;
    let subject = table.subject_column().map_err(|e| vec![e])?;
    let mut chosen = ChosenTimes::new();
    let mut errors = Vec::new();
    for row in &table.rows {
        match row.number(path, &time) {
            Ok(t) => chosen.entry(subject.as_ref().map(|c| row.text(c).to_string())).or_default().push(t),
            Err(e) => errors.push(e),
        }
    }
    if errors.is_empty() { Ok(chosen) } else { Err(errors) }
}

/// How close to the best adjusted R² a line with more levels may be and still be preferred.
pub const ADJ_R2_TOLERANCE: f64 = 1e-4;

/// The fewest levels a terminal line is drawn through.
pub const MIN_POINTS: usize = 3;

/// The terminal line ln C = intercept − λz·t and how well it fits.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Terminal {
    /// λz (1/h).
    pub lambda_z_per_h: f64,
    /// ln C at the dose time on the line (C in mg/L).
    pub intercept: f64,
    /// R² of the line.
    pub r2: f64,
    /// Adjusted R².
    pub adj_r2: f64,
    /// Levels the line goes through.
    pub points: usize,
    /// Time of its first level after the dose (h).
    pub from_h: f64,
    /// Time of its last level after the dose (h).
    pub to_h: f64,
}

impl Terminal {
    /// The line's concentration at `t` (mg/L).
    pub fn at(&self, t: f64) -> f64 {
        (self.intercept - self.lambda_z_per_h * t).exp()
    }

    /// The terminal half-life ln 2/λz (h).
    pub fn half_life_h(&self) -> f64 {
        std::f64::consts::LN_2 / self.lambda_z_per_h
    }
}

/// The least-squares line through (t, ln C) of `points` (all positive); `None` when it does not
/// fall, or when the times are all the same.
pub fn line(points: &[Sample]) -> Option<Terminal> {
    let n = points.len();
    if n < 2 {
        return None;
    }
    let nf = n as f64;
    let mean_t = points.iter().map(|p| p.t).sum::<f64>() / nf;
    let mean_y = points.iter().map(|p| p.c.ln()).sum::<f64>() / nf;
    let (mut stt, mut sty, mut syy) = (0.0, 0.0, 0.0);
    for p in points {
        let (dt, dy) = (p.t - mean_t, p.c.ln() - mean_y);
        stt += dt * dt;
        sty += dt * dy;
        syy += dy * dy;
    }
    if stt <= 0.0 {
        return None;
    }
    let slope = sty / stt;
    if slope >= 0.0 {
        return None;
    }
    // R² of a simple regression: the squared correlation; 1 when every point is on the line.
    let r2 = if syy > 0.0 { (sty * sty / (stt * syy)).min(1.0) } else { 1.0 };
    let adj_r2 = if n > 2 { 1.0 - (1.0 - r2) * (nf - 1.0) / (nf - 2.0) } else { r2 };
    Some(Terminal {
        lambda_z_per_h: -slope,
        intercept: mean_y - slope * mean_t,
        r2,
        adj_r2,
        points: n,
        from_h: points[0].t,
        to_h: points[n - 1].t,
    })
}

/// The automatic choice among the lines through the last 3, 4, … of `candidates` (positive
/// levels, sorted by time).
pub fn automatic(candidates: &[Sample]) -> Option<Terminal> {
    let lines: Vec<Terminal> =
        (MIN_POINTS..=candidates.len()).filter_map(|n| line(&candidates[candidates.len() - n..])).collect();
    let best = lines.iter().map(|l| l.adj_r2).fold(f64::NEG_INFINITY, f64::max);
    lines.into_iter().filter(|l| l.adj_r2 >= best - ADJ_R2_TOLERANCE).max_by_key(|l| l.points)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_monoexponential_gives_its_rate_constant_exactly() {
        let points: Vec<Sample> =
            [1.0, 2.0, 4.0, 8.0].iter().map(|&t| Sample { t, c: 5.0 * (-0.25 * t).exp() }).collect();
        let l = automatic(&points).unwrap();
        assert!((l.lambda_z_per_h - 0.25).abs() < 1e-14);
        assert_eq!(l.points, 4);
        assert!((l.at(0.0) - 5.0).abs() < 1e-12);
    }

    #[test]
    fn a_rising_or_short_tail_gives_no_line() {
        let up = [Sample { t: 1.0, c: 1.0 }, Sample { t: 2.0, c: 2.0 }, Sample { t: 3.0, c: 3.0 }];
        assert!(automatic(&up).is_none());
        assert!(automatic(&up[..2]).is_none());
    }
}
