//! Sweeps of candidate regimens over a virtual population: for every regimen, the probability
//! of target attainment (PTA), the probability of breaking each exposure limit, and percentiles
//! of the steady-state trough, peak and AUC24.
//!
//! Subjects are processed in fixed-size chunks, each in parallel, so memory does not grow with
//! the number of subjects: per-subject rows are written in order as each chunk completes, and
//! the results are integer counts and fixed-resolution sketches ([`sketch`]). Every subject's
//! draws come from its own seed ([`population`]), and counts add exactly, so the output is the
//! same whatever the thread count, and shards ([`state`]) merge to exactly the unsharded
//! result.

pub mod population;
pub mod sketch;
pub mod state;
pub mod summary;

use crate::dosing::{Dose, Regimen};
use crate::error::Error;
use crate::io::output::{csv_field, io_failure};
use crate::plan::targets::{Limits, Target};
use crate::plan::{Course, evaluate, last_day_end};
use population::{Population, Subject};
use rayon::prelude::*;
use state::Tally;
use std::fmt::Write as _;
use std::io::Write;
use std::ops::Range;

/// Subject-regimen evaluations per chunk: bounds the memory held between writes (about
/// 32 bytes per evaluation, plus the per-subject rows when asked for).
const CHUNK_EVALUATIONS: usize = 1 << 16;

/// The columns of the per-subject CSV.
pub const PER_SUBJECT_HEADER: &str = "subject,origin,regimen,cl_l_h,v_l,ka_per_h,trough_mg_l,peak_mg_l,\
auc24_mg_h_l,meets,over_peak,over_trough";

/// One subject's exposure under one regimen.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Outcome {
    trough_mg_l: f64,
    peak_mg_l: f64,
    auc24_mg_h_l: f64,
    meets: bool,
    over_peak: bool,
    over_trough: bool,
}

/// What to sweep.
#[derive(Debug, Clone, Copy)]
pub struct Sweep<'a> {
    /// The virtual population.
    pub population: &'a Population,
    /// The candidate regimens.
    pub candidates: &'a [Regimen],
    /// Targets every subject should meet.
    pub targets: &'a [Target],
    /// Safety limits.
    pub limits: &'a Limits,
    /// The seed of every subject's draws.
    pub seed: u64,
}

impl Sweep<'_> {
    /// The doses of each candidate from a fresh start, when a target is an AUC over a day of
    /// therapy (built once per candidate).
    fn course_doses(&self) -> Vec<Option<Vec<Dose>>> {
        let until = last_day_end(self.targets, &Course::fresh());
        self.candidates.iter().map(|c| until.map(|u| Course::fresh().continued(c, None, u))).collect()
    }

    /// Evaluate every candidate for subject `index`; with `rows`, also its per-subject rows.
    fn subject(
        &self,
        index: u64,
        doses: &[Option<Vec<Dose>>],
        rows: bool,
    ) -> Result<(Vec<Outcome>, String), Error> {
        let Subject { params, origin } = self.population.subject(self.seed, index).map_err(Error::Usage)?;
        let mut outcomes = Vec::with_capacity(self.candidates.len());
        let mut text = String::new();
        for (k, (c, d)) in self.candidates.iter().zip(doses).enumerate() {
            let e = evaluate(&params, c, self.targets, self.limits, &Course::fresh(), d.as_deref())
                .map_err(|inv| Error::Usage(format!("subject {}, regimen {}: {inv}", index + 1, k + 1)))?;
            let s = e.steady;
            let o = Outcome {
                trough_mg_l: s.trough_mg_l,
                peak_mg_l: s.peak_mg_l,
                auc24_mg_h_l: s.auc24_mg_h_l,
                meets: e.meets,
                over_peak: e.over_peak,
                over_trough: e.over_trough,
            };
            if ![o.trough_mg_l, o.peak_mg_l, o.auc24_mg_h_l].iter().all(|x| x.is_finite() && *x >= 0.0) {
                return Err(Error::Failure(format!(
                    "subject {}, regimen {}: the exposure is not a finite number ({params:?})",
                    index + 1,
                    k + 1
                )));
            }
            if rows {
                let _ = write!(text, "{},", index + 1);
                text.push_str(&csv_field(origin.unwrap_or("")));
                let _ = write!(text, ",{},{:?},{:?},", k + 1, params.cl_l_h, params.v_l);
                if let Some(ka) = params.ka_per_h {
                    let _ = write!(text, "{ka:?}");
                }
                let flag = |set: bool, on: bool| if set { if on { "true" } else { "false" } } else { "" };
                let _ = writeln!(
                    text,
                    ",{:?},{:?},{:?},{},{},{}",
                    o.trough_mg_l,
                    o.peak_mg_l,
                    o.auc24_mg_h_l,
                    o.meets,
                    flag(self.limits.max_peak_mg_l.is_some(), o.over_peak),
                    flag(self.limits.max_trough_mg_l.is_some(), o.over_trough)
                );
            }
            outcomes.push(o);
        }
        Ok((outcomes, text))
    }

    /// Evaluate every candidate once for the first subject, so that a regimen the engine
    /// refuses (an oral regimen without absorption in the model, say) is reported before any
    /// work is done.
    pub fn check(&self) -> Result<(), Error> {
        self.subject(0, &self.course_doses(), false).map(|_| ())
    }

    /// Sweep subjects `span` (0-based): per-subject rows (with [`PER_SUBJECT_HEADER`]) go to
    /// `per_subject` in subject order, `progress` hears how many subjects each finished chunk
    /// held, and the counts per regimen are returned.
    pub fn run(
        &self,
        span: Range<u64>,
        mut per_subject: Option<&mut dyn Write>,
        progress: &mut dyn FnMut(u64),
    ) -> Result<Vec<Tally>, Error> {
        let doses = self.course_doses();
        let mut tallies = vec![Tally::new(self.limits); self.candidates.len()];
        if let Some(out) = per_subject.as_mut() {
            writeln!(out, "{PER_SUBJECT_HEADER}").map_err(io_failure)?;
        }
        let rows = per_subject.is_some();
        let chunk = (CHUNK_EVALUATIONS / self.candidates.len().max(1)).max(1) as u64;
        let mut start = span.start;
        while start < span.end {
            let end = span.end.min(start + chunk);
            let results: Vec<Result<(Vec<Outcome>, String), Error>> = (0..(end - start) as usize)
                .into_par_iter()
                .map(|j| self.subject(start + j as u64, &doses, rows))
                .collect();
            // The first failure in subject order, so the message does not depend on threads.
            let done = results.into_iter().collect::<Result<Vec<_>, Error>>()?;
            tallies.par_iter_mut().enumerate().for_each(|(k, t)| done.iter().for_each(|(o, _)| t.add(&o[k])));
            if let Some(out) = per_subject.as_mut() {
                for (_, text) in &done {
                    out.write_all(text.as_bytes()).map_err(io_failure)?;
                }
            }
            progress(end - start);
            start = end;
        }
        Ok(tallies)
    }
}
