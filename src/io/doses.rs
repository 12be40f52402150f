//! The doses CSV: `time_<unit>`, `amount_<unit>`, `route`, `duration_<unit>` (infusions),
//! optional `subject`, optional `every_<unit>` + `count` to repeat a row.

use super::table::{Column, Notices, Table};
use crate::dosing::{Dose, Route, validate_dose};
use crate::error::InputError;
use crate::limits::{MAX_DOSES, check_doses};
use crate::units::Kind;
use std::collections::HashMap;

/// Dose histories read from one file, one per subject in order of first appearance.
#[derive(Debug, Clone)]
pub struct DoseFile {
    /// `(subject, doses)`; the subject is `None` when the file has no `subject` column.
    pub subjects: Vec<(Option<String>, Vec<Dose>)>,
    /// What to tell the user about the file (ignored columns).
    pub notices: Notices,
}

/// A time unit smaller than the one of `factor` (`min` beside `h`): the unit in which an
/// infusion too long for its interval was perhaps meant; `None` for minutes.
fn shorter_unit(factor: f64) -> Option<String> {
    Kind::Time.another_unit(factor).filter(|u| Kind::Time.factor(u).is_some_and(|f| f < factor))
}

/// The lines of infusions that last past the start of the subject's next dose when that dose
/// comes from another row. `doses` holds every expanded dose as (subject slot, start, infusion
/// duration or 0, line).
fn rows_overlapping_the_next(doses: &mut [(usize, f64, f64, u64)]) -> Vec<u64> {
    doses.sort_by(|a, b| a.0.cmp(&b.0).then(a.1.total_cmp(&b.1)));
    let mut lines = Vec::new();
    for (i, &(slot, t, d, line)) in doses.iter().enumerate() {
        let next = doses[i + 1..].iter().take_while(|o| o.0 == slot).find(|o| o.1 > t);
        if let Some(&(_, u, _, next_line)) = next
            && d > 0.0
            && t + d > u
            && next_line != line
        {
            lines.push(line);
        }
    }
    lines.sort_unstable();
    lines.dedup();
    lines
}

/// Parse a doses table, reporting every problem found.
pub fn parse_doses(table: &Table) -> Result<DoseFile, Vec<InputError>> {
    let src = table.source.as_str();
    let mut errors = Vec::new();
    let mut unit_col = |q: &str, k: Kind| match table.unit_column(q, k) {
        Ok(c) => c,
        Err(e) => {
            errors.push(e);
            None
        }
    };
    let time = unit_col("time", Kind::Time);
    let amount = unit_col("amount", Kind::Amount);
    let duration = unit_col("duration", Kind::Time);
    let every = unit_col("every", Kind::Time);
    let route = table.column("route");
    let subject = table.subject_column().map_err(|e| errors.push(e)).ok().flatten();
    let count = table.column("count");
    let header_line = table.header_line;
    let missing = |what: &str, example: &str| {
        InputError::in_file(src, format!("missing the {what} column (for example '{example}')"))
            .at_line(header_line)
    };
    if time.is_none() && !errors.iter().any(|e| e.place().is_some_and(|c| c.starts_with("time"))) {
        errors.push(missing("dose time", "time_h"));
    }
    if amount.is_none() && !errors.iter().any(|e| e.place().is_some_and(|c| c.starts_with("amount"))) {
        errors.push(missing("dose amount", "amount_mg"));
    }
    if route.is_none() {
        errors.push(missing("route", "route"));
    }
    if every.is_some() != count.is_some() {
        errors.push(
            InputError::in_file(src, "'every_<unit>' and 'count' go together: give both or neither")
                .at_line(header_line),
        );
    }
    let (Some(time), Some(amount), Some(route)) = (time, amount, route) else {
        return Err(errors);
    };
    if !errors.is_empty() {
        return Err(errors);
    }
    let used: Vec<&Column> = [
        Some(&time),
        Some(&amount),
        Some(&route),
        duration.as_ref(),
        every.as_ref(),
        subject.as_ref(),
        count.as_ref(),
    ]
    .into_iter()
    .flatten()
    .collect();
    let mut notices = table.ignored_columns(&used);
    let quantities: Vec<&Column> =
        [Some(&time), Some(&amount), duration.as_ref(), every.as_ref()].into_iter().flatten().collect();
    notices.warnings.extend(table.unusual_values(&quantities));
    // Infusions that last longer than their row's dosing interval overlap the next dose; so do
    // infusions of separate rows that last past the next dose of the subject.
    let mut overlapping = Vec::new();
    let mut every_dose: Vec<(usize, f64, f64, u64)> = Vec::new();

    let mut subjects: Vec<(Option<String>, Vec<Dose>)> = Vec::new();
    let mut slot_of: HashMap<&str, usize> = HashMap::new();
    let mut last_slot: Option<(&str, usize)> = None;
    // Doses expanded so far, all subjects together: bounded by MAX_DOSES before any is made.
    let mut expanded: u64 = 0;
    for row in &table.rows {
        let before = errors.len();
        let mut take = |r: Result<f64, InputError>| r.map_err(|e| errors.push(e)).ok();
        let t = take(row.number(src, &time));
        let a = take(row.number(src, &amount));
        let d = match &duration {
            Some(c) => take(row.optional_number(src, c).map(|v| v.unwrap_or(0.0))),
            None => Some(0.0),
        };
        let r = Route::parse(row.text(&route));
        if r.is_none() {
            errors.push(row.error(
                src,
                Some(&route),
                format!("expected a route (bolus, infusion or oral), found '{}'", row.text(&route)),
            ));
        }
        let repeat = match (&every, &count) {
            (Some(e), Some(c)) => repeat_of(&row, src, e, c).map_err(|e| errors.push(e)).ok(),
            _ => Some(None),
        };
        let (Some(t), Some(a), Some(d), Some(r), Some(repeat)) = (t, a, d, r, repeat) else {
            continue;
        };
        if let Err(invalid) = validate_dose(a, r, d) {
            let col = if invalid.field_name() == Some("amount_mg") {
                &amount
            } else {
                duration.as_ref().unwrap_or(&route)
            };
            errors.push(row.error(src, Some(col), invalid.message));
        }
        if errors.len() > before {
            continue;
        }
        let who = subject.as_ref().map(|c| row.text(c));
        if who == Some("") {
            errors.push(row.error(
                src,
                subject.as_ref(),
                "expected a subject identifier, found an empty field",
            ));
            continue;
        }
        // Keyed by the table's own text ("" when the file has no subject column, never a
        // subject's name), so a row costs no allocation.
        let slot = match last_slot {
            Some((name, slot)) if name == who.unwrap_or("") => slot,
            _ => *slot_of.entry(who.unwrap_or("")).or_insert_with(|| {
                subjects.push((who.map(str::to_string), Vec::new()));
                subjects.len() - 1
            }),
        };
        // A subject's rows usually follow each other: the next row likely needs no look-up.
        last_slot = Some((who.unwrap_or(""), slot));
        let (step, n) = repeat.unwrap_or((0.0, 1));
        if n > 1 && r == Route::Infusion && d > step {
            overlapping.push(row.line);
        }
        if expanded + n <= MAX_DOSES {
            let length = if r == Route::Infusion { d } else { 0.0 };
            every_dose.extend((0..n).map(|i| (slot, t + i as f64 * step, length, row.line)));
        }
        expanded += n;
        if let Err(m) = check_doses(expanded) {
            let place = count.as_ref().or(Some(&time));
            errors.push(row.error(src, place, format!("{m}; the file expands to that many by this row")));
            break;
        }
        subjects[slot].1.extend((0..n).map(|i| Dose {
            time_h: t + i as f64 * step,
            amount_mg: a,
            route: r,
            duration_h: d,
        }));
    }
    if let (Some(d), Some(e), false) = (&duration, &every, overlapping.is_empty()) {
        notices.warnings.push(format!(
            "{src}: column {}, {}: the infusion lasts longer than its dosing interval ({}), so \
             infusions overlap{}",
            d.name,
            crate::error::lines_phrase(&overlapping),
            e.name,
            d.unit_hint(shorter_unit(d.factor))
        ));
    }
    if let Some(d) = &duration {
        let past_next = rows_overlapping_the_next(&mut every_dose);
        if !past_next.is_empty() {
            notices.warnings.push(format!(
                "{src}: column {}, {}: the infusion lasts past the subject's next dose (a later row), \
                 so infusions overlap{}",
                d.name,
                crate::error::lines_phrase(&past_next),
                d.unit_hint(shorter_unit(d.factor))
            ));
        }
    }
    if errors.is_empty() {
        for (_, doses) in &mut subjects {
            doses.sort_by(|x, y| x.time_h.total_cmp(&y.time_h));
        }
        Ok(DoseFile { subjects, notices })
    } else {
        Err(errors)
    }
}

/// The `(interval, count)` of a repeated row, `None` when both fields are empty.
fn repeat_of(
    row: &super::table::Row,
    src: &str,
    every: &Column,
    count: &Column,
) -> Result<Option<(f64, u64)>, InputError> {
    let e = row.optional_number(src, every)?;
    let c_text = row.text(count);
    let c = if c_text.is_empty() {
        None
    } else {
        match c_text.parse::<u64>() {
            Ok(n) if (1..=MAX_DOSES).contains(&n) => Some(n),
            _ => {
                return Err(row.error(
                    src,
                    Some(count),
                    format!("expected a whole number of doses from 1 to {MAX_DOSES}, found '{c_text}'"),
                ));
            }
        }
    };
    match (e, c) {
        (None, None) => Ok(None),
        (Some(e), Some(c)) if e > 0.0 => Ok(Some((e, c))),
        (Some(_), Some(_)) => Err(row.error(src, Some(every), "expected a positive dosing interval")),
        (None, Some(1)) => Ok(None),
        (None, Some(_)) => Err(row.error(src, Some(every), "a count above 1 needs a dosing interval")),
        (Some(_), None) => Err(row.error(src, Some(count), "a dosing interval needs a count")),
    }
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // these values are exact in binary floating point
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<DoseFile, Vec<InputError>> {
        parse_doses(&Table::parse("d.csv", text.as_bytes())?)
    }

    #[test]
    fn units_subjects_and_repeats() {
        let f = parse(
            "subject,time_min,amount_g,route,duration_min,every_h,count,site\n\
             b,60,1,infusion,30,12,3,left arm\n\
             a,0,0.5,bolus,,,,\n",
        )
        .unwrap();
        assert_eq!(
            f.notices.warnings,
            ["d.csv: column 'site' is ignored, though its rows differ ('left arm' on line 2, '' on line 3)"]
        );
        assert_eq!(f.subjects[0].0.as_deref(), Some("b"));
        let b = &f.subjects[0].1;
        assert_eq!(b.len(), 3);
        assert_eq!((b[2].time_h, b[2].amount_mg, b[2].duration_h), (25.0, 1000.0, 0.5));
        assert_eq!(f.subjects[1].1[0].amount_mg, 500.0);
    }

    #[test]
    fn all_row_problems_are_reported() {
        let e = parse(
            "time_h,amount_mg,route,duration_h\n0,-5,bolus,\nx,100,oral,\n1,100,iv,\n2,100,infusion,\n",
        )
        .unwrap_err();
        let lines: Vec<_> = e.iter().map(|e| e.line()).collect();
        assert_eq!(lines, [Some(2), Some(3), Some(4), Some(5)], "{e:?}");
    }

    #[test]
    fn a_known_quantity_with_an_unknown_unit_is_refused() {
        let e = parse("time_h,amount_kg,route\n0,1,bolus\n").unwrap_err();
        assert_eq!(e[0].place(), Some("amount_kg"));
    }
}
