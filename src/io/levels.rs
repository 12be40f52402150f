//! The levels CSV: `time_<unit>`, `conc_<unit>`, optional `subject`, optional `lloq_<unit>`.
//! A value written `<x` is below the quantification limit x (in the column's unit); `BLQ`
//! means below the `lloq_<unit>` of its row.

use super::table::{Notices, Table};
use crate::error::InputError;
use crate::units::Kind;
use serde::Serialize;
use std::collections::{HashMap, HashSet};

/// One sampled level.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Level {
    /// Sampling time (h).
    pub time_h: f64,
    /// Measured concentration (mg/L); `None` when below the quantification limit.
    pub conc_mg_l: Option<f64>,
    /// The assay's lower limit of quantification (mg/L), when known.
    pub lloq_mg_l: Option<f64>,
    /// Line in the file, for messages.
    #[serde(skip)]
    pub line: u64,
}

impl Level {
    /// Below the quantification limit (handled by the M3 likelihood).
    pub fn is_blq(&self) -> bool {
        self.conc_mg_l.is_none()
    }
}

/// Levels read from one file, per subject in order of first appearance.
#[derive(Debug, Clone)]
pub struct LevelFile {
    /// `(subject, levels sorted by time)`; the subject is `None` without a `subject` column.
    pub subjects: Vec<(Option<String>, Vec<Level>)>,
    /// What to tell the user (ignored columns, values below a stated LLOQ).
    pub notices: Notices,
}

/// Parse a levels table, reporting every problem found.
pub fn parse_levels(table: &Table) -> Result<LevelFile, Vec<InputError>> {
    let src = table.source.as_str();
    let mut errors = Vec::new();
    let mut unit_col = |q: &str, k: Kind| table.unit_column(q, k).map_err(|e| errors.push(e)).ok().flatten();
    let time = unit_col("time", Kind::Time);
    let conc = unit_col("conc", Kind::Concentration);
    let lloq = unit_col("lloq", Kind::Concentration);
    let subject = table.subject_column().map_err(|e| errors.push(e)).ok().flatten();
    if !errors.is_empty() {
        return Err(errors);
    }
    let (Some(time), Some(conc)) = (time, conc) else {
        return Err(vec![
            InputError::in_file(
                src,
                "a levels file needs a time column (e.g. time_h) and a concentration column (e.g. conc_mg_l)",
            )
            .at_line(table.header_line),
        ]);
    };
    let used: Vec<_> =
        [Some(&time), Some(&conc), lloq.as_ref(), subject.as_ref()].into_iter().flatten().collect();
    let mut notices = table.ignored_columns(&used);
    let quantities: Vec<_> = [Some(&time), Some(&conc), lloq.as_ref()].into_iter().flatten().collect();
    notices.warnings.extend(table.unusual_values(&quantities));
    let mut subjects: Vec<(Option<String>, Vec<Level>)> = Vec::new();
    let mut slot_of: HashMap<Option<String>, usize> = HashMap::new();
    let mut seen_times: HashSet<(usize, u64)> = HashSet::new();
    for row in &table.rows {
        let t = row.number(src, &time).map_err(|e| errors.push(e)).ok();
        let limit = match &lloq {
            Some(c) => row.optional_number(src, c).map_err(|e| errors.push(e)).ok().flatten(),
            None => None,
        };
        if limit.is_some_and(|l| l <= 0.0) {
            errors.push(row.error(src, lloq.as_ref(), "expected a positive quantification limit"));
            continue;
        }
        let text = row.text(&conc);
        let value = if let Some(x) = text.strip_prefix('<') {
            match x.trim().parse::<f64>() {
                Ok(v) if v.is_finite() && v > 0.0 => {
                    match crate::limits::check(Kind::Concentration, v * conc.factor) {
                        Ok(limit) => Some((None, Some(limit))),
                        Err(m) => {
                            errors.push(row.error(src, Some(&conc), m));
                            None
                        }
                    }
                }
                _ => {
                    errors.push(row.error(
                        src,
                        Some(&conc),
                        format!("expected '<' followed by a positive limit, found '{text}'"),
                    ));
                    None
                }
            }
        } else if text.eq_ignore_ascii_case("blq") {
            if limit.is_none() {
                errors.push(row.error(
                    src,
                    Some(&conc),
                    "'BLQ' needs the limit: write '<0.5' or give an lloq_<unit> column",
                ));
                None
            } else {
                Some((None, limit))
            }
        } else {
            match row.number(src, &conc) {
                Ok(v) if v < 0.0 => {
                    errors.push(row.error(
                        src,
                        Some(&conc),
                        format!("a concentration cannot be negative, found '{text}'"),
                    ));
                    None
                }
                Ok(v) => {
                    if limit.is_some_and(|l| v < l) {
                        notices.notes.push(format!(
                            "{src}: line {}: {text} is below the stated LLOQ; it is used as measured",
                            row.line
                        ));
                    }
                    Some((Some(v), limit))
                }
                Err(e) => {
                    errors.push(e);
                    None
                }
            }
        };
        let (Some(t), Some((conc_mg_l, lloq_mg_l))) = (t, value) else { continue };
        let who = subject.as_ref().map(|c| row.text(c).to_string());
        if who.as_ref().is_some_and(String::is_empty) {
            errors.push(row.error(
                src,
                subject.as_ref(),
                "expected a subject identifier, found an empty field",
            ));
            continue;
        }
        let slot = *slot_of.entry(who.clone()).or_insert_with(|| {
            subjects.push((who, Vec::new()));
            subjects.len() - 1
        });
        if !seen_times.insert((slot, t.to_bits())) {
            errors.push(row.error(
                src,
                Some(&time),
                format!("a second level at the same time ({t} h) for this subject"),
            ));
            continue;
        }
        subjects[slot].1.push(Level { time_h: t, conc_mg_l, lloq_mg_l, line: row.line });
    }
    if !errors.is_empty() {
        return Err(errors);
    }
    for (_, levels) in &mut subjects {
        levels.sort_by(|a, b| a.time_h.total_cmp(&b.time_h));
    }
    Ok(LevelFile { subjects, notices })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blq_values_and_units() {
        let t = Table::parse("l.csv", b"time_min,conc_ug_l,lloq_ug_l\n120,1500,\n60,<200,\n300,BLQ,250\n")
            .unwrap();
        let f = parse_levels(&t).unwrap();
        let l = &f.subjects[0].1;
        assert_eq!(l.len(), 3);
        assert!(
            l[0].is_blq()
                && (l[0].lloq_mg_l.unwrap() - 0.2).abs() < 1e-15
                && (l[0].time_h - 1.0).abs() < 1e-15
        );
        assert!((l[1].conc_mg_l.unwrap() - 1.5).abs() < 1e-15);
        assert!(l[2].is_blq() && (l[2].lloq_mg_l.unwrap() - 0.25).abs() < 1e-15);
    }

    #[test]
    fn negative_duplicate_and_bad_limits_are_located() {
        let t = Table::parse("l.csv", b"time_h,conc_mg_l\n1,-2\n2,3\n2,4\n3,<x\n").unwrap();
        let e = parse_levels(&t).unwrap_err();
        let lines: Vec<_> = e.iter().map(|e| e.line().unwrap()).collect();
        assert_eq!(lines, [2, 4, 5], "{e:?}");
    }
}
