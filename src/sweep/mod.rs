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

pub mod join;
pub mod population;
pub mod sketch;
pub mod state;
pub mod summary;

use crate::dosing::{Dose, Regimen};
use crate::engine::steady::{Exposure, unit_exposure};
use crate::error::Error;
use crate::io::digest::Digesting;
use crate::io::output::{CsvWriter, io_failure};
use crate::plan::targets::{Limits, Target};
use crate::plan::{Course, Verdict, judge, last_day_end};
use population::{Population, Subject};
use rayon::prelude::*;
use sketch::Slot;
use state::{RowsWritten, Setup, Shard, SweepState, Tally};
use std::io::Write;
use std::ops::Range;

/// Subject-regimen evaluations per chunk: bounds the memory held between writes (about
/// 32 bytes per evaluation, plus the per-subject rows when asked for).
const CHUNK_EVALUATIONS: usize = 1 << 16;

/// The tasks each chunk is split into: each evaluates its subjects in order and writes their
/// rows with one CSV writer, and there are enough of them to keep every thread busy.
const TASKS_PER_CHUNK: u64 = 64;

/// The columns of the per-subject CSV.
pub const PER_SUBJECT_HEADER: &str = "subject,origin,regimen,cl_l_h,v_l,ka_per_h,trough_mg_l,peak_mg_l,\
auc24_mg_h_l,meets,over_peak,over_trough";

/// One subject's exposure under one regimen, as the tallies count it.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Outcome {
    /// The sketch slots of the trough, peak and AUC24.
    slots: [Slot; 3],
    verdict: Verdict,
}

/// The candidates by dosing shape (route, interval, infusion duration). Linear kinetics make
/// the exposure to any amount of one shape that shape's exposure to 1 mg times the amount, so
/// each subject evaluates the closed forms once per shape, not once per candidate.
#[derive(Debug, Clone)]
struct Shapes {
    /// The first candidate of each shape, in grid order.
    first: Vec<(usize, Regimen)>,
    /// Each candidate's shape (an index into `first`).
    of: Vec<usize>,
    /// ln of each candidate's amount: the logarithm of an exposure is ln amount + ln(the
    /// exposure to 1 mg), so the sketch needs no logarithm per value.
    ln_amount: Vec<f64>,
}

impl Shapes {
    /// Group `candidates`, refusing an invalid one (its amount is checked here, its shape for
    /// each subject).
    fn new(candidates: &[Regimen]) -> Result<Shapes, Error> {
        // A regimen's shape is the regimen of 1 mg.
        let same =
            |a: &Regimen, b: &Regimen| Regimen { amount_mg: 1.0, ..*a } == Regimen { amount_mg: 1.0, ..*b };
        let mut first: Vec<(usize, Regimen)> = Vec::new();
        let mut of = Vec::with_capacity(candidates.len());
        for (k, c) in candidates.iter().enumerate() {
            c.validate().map_err(|inv| Error::Usage(format!("regimen {}: {inv}", k + 1)))?;
            of.push(match first.iter().position(|(_, f)| same(f, c)) {
                Some(i) => i,
                None => {
                    first.push((k, *c));
                    first.len() - 1
                }
            });
        }
        Ok(Shapes { first, of, ln_amount: candidates.iter().map(|c| c.amount_mg.ln()).collect() })
    }
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

    /// Evaluate every candidate for subjects `span`, in order (outcomes subject by subject);
    /// with `rows`, also their per-subject rows as CSV.
    fn subjects(
        &self,
        span: Range<u64>,
        shapes: &Shapes,
        doses: &[Option<Vec<Dose>>],
        rows: bool,
    ) -> Result<(Vec<Outcome>, Vec<u8>), Error> {
        let mut outcomes = Vec::with_capacity((span.end - span.start) as usize * self.candidates.len());
        let mut unit = Vec::with_capacity(shapes.first.len());
        let mut csv = rows.then(|| CsvWriter::new(Vec::new()));
        for index in span {
            self.subject(index, shapes, doses, &mut unit, &mut outcomes, csv.as_mut())?;
        }
        let bytes = match csv {
            Some(w) => w.finish().map_err(io_failure)?,
            None => Vec::new(),
        };
        Ok((outcomes, bytes))
    }

    /// Evaluate every candidate for subject `index` into `outcomes` (`unit` is scratch for the
    /// exposure to 1 mg of each shape, with the logarithms of its trough, peak and AUC24); with
    /// `rows`, also write its per-subject rows.
    fn subject(
        &self,
        index: u64,
        shapes: &Shapes,
        doses: &[Option<Vec<Dose>>],
        unit: &mut Vec<(Exposure, [f64; 3])>,
        outcomes: &mut Vec<Outcome>,
        mut rows: Option<&mut CsvWriter<Vec<u8>>>,
    ) -> Result<(), Error> {
        let subject = self.population.subject(self.seed, index).map_err(Error::Usage)?;
        let params = subject.params;
        let refused =
            |k: usize, inv| Error::Usage(format!("subject {}, regimen {}: {inv}", index + 1, k + 1));
        unit.clear();
        for (k, c) in &shapes.first {
            let u = unit_exposure(&params, c).map_err(|inv| refused(*k, inv))?;
            unit.push((u, [u.trough_mg_l.ln(), u.peak_mg_l.ln(), u.auc24_mg_h_l.ln()]));
        }
        let each = self.candidates.iter().zip(doses).zip(&shapes.of).zip(&shapes.ln_amount);
        for (k, (((c, d), &shape), ln_amount)) in each.enumerate() {
            let (u, ln_u) = &unit[shape];
            let steady = u.scaled(c.amount_mg);
            let verdict =
                judge(&params, c, &steady, self.targets, self.limits, &Course::fresh(), d.as_deref(), |_| {})
                    .map_err(|inv| refused(k, inv))?;
            let values = [steady.trough_mg_l, steady.peak_mg_l, steady.auc24_mg_h_l];
            // Finite and non-negative (NaN fails too).
            if !values.iter().all(|x| (0.0..f64::INFINITY).contains(x)) {
                return Err(Error::Failure(format!(
                    "subject {}, regimen {}: the exposure is not a finite number ({params:?})",
                    index + 1,
                    k + 1
                )));
            }
            if let Some(w) = rows.as_mut() {
                self.write_row(w, index, &subject, k, &steady, &verdict).map_err(io_failure)?;
            }
            outcomes.push(Outcome { slots: ln_u.map(|l| Slot::of_ln(l + ln_amount)), verdict });
        }
        Ok(())
    }

    /// One per-subject row (the columns of [`PER_SUBJECT_HEADER`]).
    fn write_row(
        &self,
        w: &mut CsvWriter<Vec<u8>>,
        index: u64,
        subject: &Subject,
        k: usize,
        steady: &Exposure,
        verdict: &Verdict,
    ) -> std::io::Result<()> {
        let Subject { params, origin } = subject;
        let yes_no = |on: bool| if on { "true" } else { "false" };
        // Empty without the limit.
        let over = |limit: Option<f64>, on: bool| if limit.is_some() { yes_no(on) } else { "" };
        w.integer(index + 1)?;
        w.text(origin.unwrap_or(""))?;
        w.integer(k as u64 + 1)?;
        w.number(params.cl_l_h)?;
        w.number(params.v_l)?;
        match params.ka_per_h {
            Some(ka) => w.number(ka)?,
            None => w.text("")?,
        }
        w.number(steady.trough_mg_l)?;
        w.number(steady.peak_mg_l)?;
        w.number(steady.auc24_mg_h_l)?;
        w.text(yes_no(verdict.meets))?;
        w.text(over(self.limits.max_peak_mg_l, verdict.over_peak))?;
        w.text(over(self.limits.max_trough_mg_l, verdict.over_trough))?;
        w.end_row()
    }

    /// Evaluate every candidate once for the first subject, so that a regimen the engine
    /// refuses (an oral regimen without absorption in the model, say) is reported before any
    /// work is done.
    pub fn check(&self) -> Result<(), Error> {
        self.subjects(0..1, &Shapes::new(self.candidates)?, &self.course_doses(), false).map(|_| ())
    }

    /// Sweep `shard` of the sweep `setup` (whose subjects are this population's) into its
    /// state. With `per_subject`, its rows go there too and the state records their number
    /// and digest, so that the part can be checked before it is joined with the others.
    pub fn run_shard(
        &self,
        setup: Setup,
        shard: Shard,
        per_subject: Option<&mut dyn Write>,
        progress: &mut dyn FnMut(u64),
    ) -> Result<SweepState, Error> {
        let span = shard.span(setup.subjects);
        let (tallies, rows) = match per_subject {
            Some(out) => {
                let mut digesting = Digesting::new(out);
                let tallies = self.run(span.clone(), Some(&mut digesting), progress)?;
                let rows = (span.end - span.start) * self.candidates.len() as u64;
                (tallies, Some(RowsWritten { rows, sha256: digesting.finish() }))
            }
            None => (self.run(span, None, progress)?, None),
        };
        Ok(SweepState::new(setup, shard, tallies, rows))
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
        let shapes = Shapes::new(self.candidates)?;
        let regimens = self.candidates.len();
        let mut tallies = vec![Tally::new(self.limits); regimens];
        if let Some(out) = per_subject.as_mut() {
            let mut w = CsvWriter::new(&mut **out);
            w.row(PER_SUBJECT_HEADER.split(',')).map_err(io_failure)?;
            w.finish().map_err(io_failure)?;
        }
        let rows = per_subject.is_some();
        let chunk = (CHUNK_EVALUATIONS / regimens.max(1)).max(1) as u64;
        let mut start = span.start;
        while start < span.end {
            let end = span.end.min(start + chunk);
            let per_task = (end - start).div_ceil(TASKS_PER_CHUNK);
            let results: Vec<Result<_, Error>> = (0..(end - start).div_ceil(per_task))
                .into_par_iter()
                .map(|j| {
                    let first = start + j * per_task;
                    self.subjects(first..end.min(first + per_task), &shapes, &doses, rows)
                })
                .collect();
            // The first failure in subject order, so the message does not depend on threads.
            let done = results.into_iter().collect::<Result<Vec<_>, Error>>()?;
            tallies.par_iter_mut().enumerate().for_each(|(k, t)| {
                done.iter().flat_map(|(o, _)| o.chunks_exact(regimens)).for_each(|o| t.add(&o[k]))
            });
            if let Some(out) = per_subject.as_mut() {
                for (_, csv) in &done {
                    out.write_all(csv).map_err(io_failure)?;
                }
            }
            progress(end - start);
            start = end;
        }
        Ok(tallies)
    }
}
