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
use crate::engine::steady::{Exposure, check_regimen, closed_form, unit_exposure};
use crate::error::{Error, InputError};
use crate::io::digest::Digesting;
use crate::io::output::{CsvWriter, io_failure};
use crate::plan::targets::{Limits, Metric, Target};
use crate::plan::{Course, Verdict, judge, last_day_end};
use population::{Population, Subject};
use rayon::prelude::*;
use state::{RowsWritten, Setup, Shard, SweepState, Tally};
use std::io::Write;
use std::ops::Range;

/// Subject-regimen evaluations per chunk without per-subject rows (about 56 bytes held per
/// subject and dosing shape). Each regimen's sketches take in a chunk's values at once, so their
/// counters come into the cache once per chunk: larger chunks than with rows pay that less often
/// (a sweep of 100 regimens took 10–15 % less time than with 1 << 16; 1 << 22 was slower again).
const CHUNK_EVALUATIONS: usize = 1 << 18;

/// Subject-regimen evaluations per chunk with per-subject rows: bounds the memory held between
/// writes (the rows, about 135 bytes per evaluation).
const CHUNK_EVALUATIONS_WITH_ROWS: usize = 1 << 16;

/// The tasks each chunk's subjects are split into: each evaluates its subjects in order and
/// writes their rows with one CSV writer, and there are enough of them to keep every thread
/// busy.
const TASKS_PER_CHUNK: u64 = 64;

/// The columns of the per-subject CSV.
pub const PER_SUBJECT_HEADER: &str = "subject,origin,regimen,cl_l_h,v_l,ka_per_h,trough_mg_l,peak_mg_l,\
auc24_mg_h_l,meets,over_peak,over_trough";

/// The columns a [`Block`] holds for each subject and shape: the steady-state trough, peak,
/// AUC24 and average concentration after 1 mg, then the logarithms of the first three (the
/// logarithm of an exposure is ln amount + ln(the exposure to 1 mg), so the sketches need no
/// logarithm per value).
const TROUGH: usize = 0;
const PEAK: usize = 1;
const AUC24: usize = 2;
const CAVG: usize = 3;
const LN_TROUGH: usize = 4;
const COLUMNS: usize = 7;

/// An exposure to 1 mg as the columns of a [`Block`].
fn columns(u: &Exposure) -> [f64; COLUMNS] {
    let values = [u.trough_mg_l, u.peak_mg_l, u.auc24_mg_h_l];
    let [ln_trough, ln_peak, ln_auc24] = values.map(f64::ln);
    [u.trough_mg_l, u.peak_mg_l, u.auc24_mg_h_l, u.cavg_mg_l, ln_trough, ln_peak, ln_auc24]
}

/// The candidates by dosing shape (route, interval, infusion duration). Linear kinetics make
/// the exposure to any amount of one shape that shape's exposure to 1 mg times the amount, so
/// each subject evaluates the closed forms once per shape, not once per candidate.
#[derive(Debug, Clone)]
struct Shapes {
    /// The first candidate of each shape, in grid order.
    first: Vec<(usize, Regimen)>,
    /// The largest amount of each shape.
    largest: Vec<f64>,
    /// The first dose of each shape, against which each subject's parameters are checked.
    doses: Vec<Dose>,
    /// Whether each shape passes the checks that concern the regimen alone.
    sound: Vec<bool>,
    /// Each candidate's shape (an index into `first`).
    of: Vec<usize>,
    /// ln of each candidate's amount.
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
        let mut largest: Vec<f64> = Vec::new();
        let mut of = Vec::with_capacity(candidates.len());
        for (k, c) in candidates.iter().enumerate() {
            c.validate().map_err(|inv| Error::Usage(format!("regimen {}: {inv}", k + 1)))?;
            let shape = match first.iter().position(|(_, f)| same(f, c)) {
                Some(i) => i,
                None => {
                    first.push((k, *c));
                    largest.push(0.0);
                    first.len() - 1
                }
            };
            largest[shape] = largest[shape].max(c.amount_mg);
            of.push(shape);
        }
        Ok(Shapes {
            doses: first.iter().map(|(_, c)| c.dose_at(0.0)).collect(),
            sound: first.iter().map(|(_, c)| check_regimen(c).is_ok()).collect(),
            first,
            largest,
            of,
            ln_amount: candidates.iter().map(|c| c.amount_mg.ln()).collect(),
        })
    }

    /// Whether every amount of `shape` gives a subject whose exposure to 1 mg is `unit` a
    /// finite, non-negative trough, peak and AUC24: rounding is monotone, so the largest
    /// amount's exposure bounds the others'.
    fn bounded(&self, shape: usize, unit: &Exposure) -> bool {
        let largest = self.largest[shape];
        [unit.trough_mg_l, unit.peak_mg_l, unit.auc24_mg_h_l]
            .iter()
            .all(|x| x * largest >= 0.0 && x * largest < f64::INFINITY)
    }
}

/// How the tallies learn each evaluation's verdict.
#[derive(Debug, Clone)]
enum Verdicts {
    /// In the tallies' own loop, from the steady-state exposure: every target is on the
    /// trough, peak, AUC24 or average concentration, so each subject meets them all when each
    /// of these values (its column's times the amount) lies within `lo` and `hi` (the
    /// largest lower and smallest upper bound of its targets, infinite without one, which every
    /// finite value is within). A limit not set is infinite too.
    Steady { lo: [f64; 4], hi: [f64; 4], max_peak: f64, max_trough: f64 },
    /// From [`judge`], evaluation by evaluation as each subject is evaluated: a target needs
    /// more than the steady state (the curve, the dose history), or the per-subject rows are
    /// written.
    Judged,
}

impl Verdicts {
    fn new(targets: &[Target], limits: &Limits, rows: bool) -> Verdicts {
        let (mut lo, mut hi) = ([f64::NEG_INFINITY; 4], [f64::INFINITY; 4]);
        for t in targets {
            let column = match t.metric {
                Metric::Trough => TROUGH,
                Metric::Peak => PEAK,
                Metric::Auc24 => AUC24,
                Metric::Cavg => CAVG,
                Metric::Above { .. } | Metric::AucDay { .. } => return Verdicts::Judged,
            };
            // A NaN bound, which no value meets, is left to `judge` too.
            if [t.lo, t.hi].iter().flatten().any(|b| b.is_nan()) {
                return Verdicts::Judged;
            }
            lo[column] = t.lo.map_or(lo[column], |b| b.max(lo[column]));
            hi[column] = t.hi.map_or(hi[column], |b| b.min(hi[column]));
        }
        if rows {
            return Verdicts::Judged;
        }
        Verdicts::Steady {
            lo,
            hi,
            max_peak: limits.max_peak_mg_l.unwrap_or(f64::INFINITY),
            max_trough: limits.max_trough_mg_l.unwrap_or(f64::INFINITY),
        }
    }
}

/// The evaluations of a block of consecutive subjects, as the tallies read them.
#[derive(Debug)]
struct Block {
    /// Subjects in the block.
    subjects: usize,
    /// Column `c` of shape `s` for each subject in order: `data[(s * COLUMNS + c) * subjects..]`,
    /// so that a regimen's tally reads each column of its shape straight through.
    data: Vec<f64>,
    /// With [`Verdicts::Judged`], every evaluation's verdict, subject by subject.
    verdicts: Vec<Verdict>,
    /// The per-subject rows as CSV, when asked for.
    rows: Vec<u8>,
}

impl Block {
    /// Column `c` of shape `shape`.
    fn column(&self, shape: usize, c: usize) -> &[f64] {
        &self.data[(shape * COLUMNS + c) * self.subjects..][..self.subjects]
    }

    /// Blocks of consecutive subjects, in order, as one, so that the tallies run through each
    /// column once per chunk (without their rows, which are written block by block).
    fn join(parts: &[Block], shapes: usize) -> Block {
        let subjects = parts.iter().map(|b| b.subjects).sum();
        let mut data = Vec::with_capacity(shapes * COLUMNS * subjects);
        for c in 0..shapes * COLUMNS {
            parts.iter().for_each(|b| data.extend_from_slice(&b.data[c * b.subjects..][..b.subjects]));
        }
        let verdicts = parts.iter().flat_map(|b| &b.verdicts).copied().collect();
        Block { subjects, data, verdicts, rows: Vec::new() }
    }
}

/// A chunk's evaluations: its blocks joined, with the smallest and largest value of each
/// logarithm column of each shape (three pairs per shape), which bound the sketches' bins.
#[derive(Debug)]
struct Chunk {
    block: Block,
    ln_range: Vec<(f64, f64)>,
}

impl Chunk {
    fn new(blocks: &[Block], shapes: usize) -> Chunk {
        let block = Block::join(blocks, shapes);
        let range = |j: usize| {
            let column = block.column(j / 3, LN_TROUGH + j % 3).iter();
            column.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &x| (lo.min(x), hi.max(x)))
        };
        let ln_range = (0..shapes * 3).map(range).collect();
        Chunk { block, ln_range }
    }
}

/// The refusal of candidate `k` for subject `index`.
fn refused(index: u64, k: usize, inv: InputError) -> Error {
    Error::Usage(format!("subject {}, regimen {}: {inv}", index + 1, k + 1))
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

    /// Evaluate every shape for subjects `span`, in order; with [`Verdicts::Judged`], judge
    /// every candidate too, and with `rows`, write their per-subject rows as CSV.
    fn block(
        &self,
        span: Range<u64>,
        shapes: &Shapes,
        doses: &[Option<Vec<Dose>>],
        verdicts: &Verdicts,
        rows: bool,
    ) -> Result<Block, Error> {
        let subjects = (span.end - span.start) as usize;
        let judged = matches!(verdicts, Verdicts::Judged);
        let mut block = Block {
            subjects,
            data: vec![0.0; shapes.first.len() * COLUMNS * subjects],
            verdicts: Vec::with_capacity(if judged { subjects * self.candidates.len() } else { 0 }),
            rows: Vec::new(),
        };
        let mut unit = Vec::with_capacity(shapes.first.len());
        let mut csv = rows.then(|| CsvWriter::new(Vec::new()));
        for (i, index) in span.enumerate() {
            let subject = self.population.subject(self.seed, index).map_err(Error::Usage)?;
            let params = &subject.params;
            // Parameters valid for every shape's doses, and a shape sound by itself, pass the
            // checks of `unit_exposure`, which otherwise says what is wrong.
            let checked = params.validate(&shapes.doses).is_ok();
            unit.clear();
            let mut bounded = true;
            for (shape, (k, c)) in shapes.first.iter().enumerate() {
                let u = if checked && shapes.sound[shape] {
                    closed_form(params, c)
                } else {
                    unit_exposure(params, c).map_err(|inv| refused(index, *k, inv))?
                };
                bounded &= shapes.bounded(shape, &u);
                for (c, x) in columns(&u).into_iter().enumerate() {
                    block.data[(shape * COLUMNS + c) * subjects + i] = x;
                }
                unit.push(u);
            }
            // An exposure out of bounds is refused by the first evaluation that meets it.
            if judged || !bounded {
                self.judge(index, &subject, shapes, doses, &unit, &mut block.verdicts, csv.as_mut())?;
            }
        }
        if let Some(w) = csv {
            block.rows = w.finish().map_err(io_failure)?;
        }
        Ok(block)
    }

    /// Judge every candidate for subject `index`, whose exposure to 1 mg of each shape is
    /// `unit`, into `verdicts`; with `rows`, also write its per-subject rows.
    #[allow(clippy::too_many_arguments)] // the subject's evaluations and where they go
    fn judge(
        &self,
        index: u64,
        subject: &Subject,
        shapes: &Shapes,
        doses: &[Option<Vec<Dose>>],
        unit: &[Exposure],
        verdicts: &mut Vec<Verdict>,
        mut rows: Option<&mut CsvWriter<Vec<u8>>>,
    ) -> Result<(), Error> {
        let params = subject.params;
        for (k, ((c, d), &shape)) in self.candidates.iter().zip(doses).zip(&shapes.of).enumerate() {
            let steady = unit[shape].scaled(c.amount_mg);
            let verdict =
                judge(&params, c, &steady, self.targets, self.limits, &Course::fresh(), d.as_deref(), |_| {})
                    .map_err(|inv| refused(index, k, inv))?;
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
                self.write_row(w, index, subject, k, &steady, &verdict).map_err(io_failure)?;
            }
            verdicts.push(verdict);
        }
        Ok(())
    }

    /// Count candidate `k`'s evaluations in `chunk` into its tally.
    fn count(&self, k: usize, tally: &mut Tally, chunk: &Chunk, shapes: &Shapes, verdicts: &Verdicts) {
        let Chunk { block: chunk, ln_range } = chunk;
        let (x, shape, ln_amount) = (self.candidates[k].amount_mg, shapes.of[k], shapes.ln_amount[k]);
        let [meets, over_peak, over_trough] = match verdicts {
            Verdicts::Steady { lo, hi, max_peak, max_trough } => {
                let column = |c| chunk.column(shape, c).iter().map(move |u| u * x);
                let each = column(TROUGH).zip(column(PEAK)).zip(column(AUC24)).zip(column(CAVG));
                each.fold([0, 0, 0], |[meets, over_peak, over_trough], (((t, p), a), c)| {
                    // Every bound tested (`&`, not `&&`), so that nothing branches.
                    let bounds = lo.iter().zip(hi);
                    let within = [t, p, a, c]
                        .iter()
                        .zip(bounds)
                        .fold(true, |all, (v, (lo, hi))| all & (v >= lo) & (v <= hi));
                    [
                        meets + u64::from(within),
                        over_peak + u64::from(p > *max_peak),
                        over_trough + u64::from(t > *max_trough),
                    ]
                })
            }
            Verdicts::Judged => {
                let each = chunk.verdicts.iter().skip(k).step_by(self.candidates.len());
                each.fold([0, 0, 0], |[meets, over_peak, over_trough], v| {
                    [
                        meets + u64::from(v.meets),
                        over_peak + u64::from(v.over_peak),
                        over_trough + u64::from(v.over_trough),
                    ]
                })
            }
        };
        tally.add(chunk.subjects as u64, meets, over_peak, over_trough);
        let sketches = [&mut tally.trough_mg_l, &mut tally.peak_mg_l, &mut tally.auc24_mg_h_l];
        for (m, sketch) in sketches.into_iter().enumerate() {
            sketch.count_shifted(chunk.column(shape, LN_TROUGH + m), ln_amount, ln_range[shape * 3 + m]);
        }
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
        let shapes = Shapes::new(self.candidates)?;
        self.block(0..1, &shapes, &self.course_doses(), &Verdicts::Judged, false).map(|_| ())
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
        let rows = per_subject.is_some();
        let verdicts = Verdicts::new(self.targets, self.limits, rows);
        let regimens = self.candidates.len();
        let mut tallies = vec![Tally::new(self.limits); regimens];
        if let Some(out) = per_subject.as_mut() {
            let mut w = CsvWriter::new(&mut **out);
            w.row(PER_SUBJECT_HEADER.split(',')).map_err(io_failure)?;
            w.finish().map_err(io_failure)?;
        }
        let evaluations = if rows { CHUNK_EVALUATIONS_WITH_ROWS } else { CHUNK_EVALUATIONS };
        let chunk = (evaluations / regimens.max(1)).max(1) as u64;
        let mut start = span.start;
        while start < span.end {
            let end = span.end.min(start + chunk);
            let per_task = (end - start).div_ceil(TASKS_PER_CHUNK);
            let results: Vec<Result<_, Error>> = (0..(end - start).div_ceil(per_task))
                .into_par_iter()
                .map(|j| {
                    let first = start + j * per_task;
                    self.block(first..end.min(first + per_task), &shapes, &doses, &verdicts, rows)
                })
                .collect();
            // The first failure in subject order, so the message does not depend on threads.
            let blocks = results.into_iter().collect::<Result<Vec<_>, Error>>()?;
            let chunk = Chunk::new(&blocks, shapes.first.len());
            tallies
                .par_iter_mut()
                .enumerate()
                .for_each(|(k, t)| self.count(k, t, &chunk, &shapes, &verdicts));
            if let Some(out) = per_subject.as_mut() {
                for b in &blocks {
                    out.write_all(&b.rows).map_err(io_failure)?;
                }
            }
            progress(end - start);
            start = end;
        }
        Ok(tallies)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dosing::Route;
    use crate::engine::Params;
    use crate::plan::candidates::{Durations, grid};
    use crate::plan::targets::parse_target;
    use crate::sweep::population::ParamRows;

    /// The tallies' own verdicts, from the steady state, are those of `judge`, which decides
    /// the per-subject rows: the same sweep counts the same with rows and without.
    #[test]
    fn verdicts_from_the_steady_state_are_those_of_judge() {
        let mut rows = ParamRows::default();
        for i in 0..700 {
            let x = f64::from(i);
            let (cl_l_h, v_l) = (1.0 + 8.0 * (0.37 * x).sin().abs(), 20.0 + 60.0 * (0.11 * x).cos().abs());
            rows.push(&format!("s{i}"), Params { cl_l_h, v_l, ka_per_h: None, f: 1.0, tlag_h: 0.0 });
        }
        let population = Population::from_params(rows);
        let candidates = grid(
            &[250.0, 500.0, 1000.0, 2000.0],
            &[8.0, 12.0, 24.0],
            Route::Infusion,
            &Durations::Fixed(vec![1.0, 2.0]),
        )
        .unwrap();
        let targets = ["auc24=400..600", "trough=5..20", "peak=..60", "cavg=10..", "auc24=300..550"]
            .map(|t| parse_target(t).unwrap());
        let limits = Limits { max_peak_mg_l: Some(40.0), max_trough_mg_l: Some(25.0), ..Limits::default() };
        assert!(matches!(Verdicts::new(&targets, &limits, false), Verdicts::Steady { .. }));
        let sweep = Sweep {
            population: &population,
            candidates: &candidates,
            targets: &targets,
            limits: &limits,
            seed: 1,
        };
        let steady = sweep.run(0..700, None, &mut |_| {}).unwrap();
        let judged = sweep.run(0..700, Some(&mut std::io::sink()), &mut |_| {}).unwrap();
        assert_eq!(steady, judged);
        // The targets and limits decide: some subjects meet them, some break each limit.
        assert!(steady.iter().any(|t| t.meets > 0) && steady.iter().any(|t| t.meets < 700));
        assert!(
            steady.iter().any(|t| t.over_peak > Some(0)) && steady.iter().any(|t| t.over_trough > Some(0))
        );
    }
}
