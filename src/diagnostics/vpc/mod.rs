//! The visual predictive check (VPC): replicate studies simulated from a population model with
//! the study's own doses, sampling times and covariates; in each bin of levels the observed
//! 5th, 50th and 95th percentiles beside the 90 % intervals of the same percentiles over the
//! replicates, and the fraction below the quantification limit beside its interval
//! (docs/methods.md, section 12.6).
//!
//! A replicate draws each subject's random effects η = L·z (Ω = L·Lᵀ) and each level's residual
//! error, y = f + σ(f)·ε, as the NPDE's simulations do; a simulated level below its level's
//! LLOQ is censored like an observed one. Percentiles are nearest-rank ([`crate::stats`]), with
//! censored values ranked below every quantified one: a percentile whose rank falls on a
//! censored value is below the limit and has no value. The same rule gives the interval over
//! the replicates (their 5th, 50th and 95th percentiles).
//!
//! **Prediction correction** (Bergstrand, Hooker, Wallin & Karlsson, AAPS J 2011;13:143–151,
//! doi:10.1208/s12248-011-9255-z): every observed and simulated value of a level is multiplied
//! by PRED_bin / PRED_i, where PRED_i is the level's population prediction (η = 0, its subject's
//! covariates and doses) and PRED_bin the median of PRED over the bin's levels (lower bound 0).
//!
//! Each replicate draws from its own stream ([`Seeds::vpc_replicate`]) and the replicates are
//! simulated in parallel, so the result depends on the seed alone.

pub mod bins;
pub mod plot;

use crate::choice::choice_enum;
use crate::engine::{Params, concentrations};
use crate::error::InputError;
use crate::fit::SubjectData;
use crate::model::PopulationModel;
use crate::seeds::Seeds;
use crate::stats::nearest_rank;
use rand::SeedableRng;
use rand::distr::Distribution;
use rand::rngs::StdRng;
use rayon::prelude::*;
use serde::Serialize;
use statrs::distribution::Normal;

/// Replicate studies unless asked otherwise.
pub const REPLICATES: usize = 500;
/// The most replicates asked for.
pub const MAX_REPLICATES: usize = 100_000;
/// The most simulated levels (replicates × levels), which bounds the work.
pub const MAX_SIMULATED: u64 = 100_000_000;
/// The percentiles compared in each bin, and those over the replicates (the 90 % interval
/// and its median).
pub const PERCENTILES: [u32; 3] = [5, 50, 95];

choice_enum! {
    /// The time levels are binned by.
    #[derive(Debug, Clone, Copy, PartialEq, Eq)]
    pub enum BinBy: "binning time" {
        /// Hours since the latest dose at or before the level.
        TimeAfterDose = "time-after-dose",
        /// Hours on the files' clock.
        Time = "time",
    }
}

/// How the levels are binned.
#[derive(Debug, Clone, PartialEq)]
pub enum Bins {
    /// By the data's sampling clusters ([`bins::automatic`]).
    Auto,
    /// By given edges (h), strictly increasing.
    Edges(Vec<f64>),
}

/// What a VPC is asked for.
#[derive(Debug, Clone, PartialEq)]
pub struct VpcOptions {
    /// Replicate studies, 1 to [`MAX_REPLICATES`].
    pub replicates: usize,
    /// The seed of every draw.
    pub seed: u64,
    /// The binning time.
    pub bin_by: BinBy,
    /// The bins.
    pub bins: Bins,
    /// Prediction-corrected (pcVPC).
    pub prediction_corrected: bool,
}

/// One compared statistic of a bin: its observed value and the 5th, 50th and 95th percentiles
/// of the same statistic over the replicates. `None` where the value lies below the limit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Compared {
    /// The statistic of the observed levels.
    pub observed: Option<f64>,
    /// The lower end of the 90 % interval over the replicates.
    pub simulated_lo: Option<f64>,
    /// The median over the replicates.
    pub simulated_median: Option<f64>,
    /// The upper end of the 90 % interval over the replicates.
    pub simulated_hi: Option<f64>,
}

impl Compared {
    /// Whether the observed value lies in the interval; `None` when any of the three is
    /// below the limit.
    pub fn inside(&self) -> Option<bool> {
        let (o, lo, hi) = (self.observed?, self.simulated_lo?, self.simulated_hi?);
        Some(lo <= o && o <= hi)
    }
}

/// One bin.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VpcBin {
    /// Number, from 1 in time order.
    pub bin: usize,
    /// The bin's start (h): its first level's time (automatic bins) or its lower edge.
    pub from_h: f64,
    /// The bin's end (h): its last level's time or its upper edge.
    pub to_h: f64,
    /// The mean binning time of its levels (h), where the plot draws the bin.
    pub mid_h: f64,
    /// Levels in the bin.
    pub levels: usize,
    /// Of them below the limit.
    pub blq: usize,
    /// The 5th percentile.
    pub p05_mg_l: Compared,
    /// The median.
    pub p50_mg_l: Compared,
    /// The 95th percentile.
    pub p95_mg_l: Compared,
    /// The fraction of levels below the limit.
    pub blq_fraction: Compared,
}

impl VpcBin {
    /// The three percentiles in order with their numbers (5, 50, 95).
    pub fn percentiles(&self) -> [(u32, &Compared); 3] {
        [(5, &self.p05_mg_l), (50, &self.p50_mg_l), (95, &self.p95_mg_l)]
    }
}

/// An observed level as the check sees it (for the plot).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ObservedLevel {
    /// Binning time (h).
    pub x_h: f64,
    /// The level (prediction-corrected when asked), `None` below the limit.
    pub value_mg_l: Option<f64>,
    /// Its limit (corrected likewise), when known.
    pub lloq_mg_l: Option<f64>,
}

/// How many observed percentiles lie in their interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Coverage {
    /// Percentiles (bins × 3) with an observed value and both ends of the interval.
    pub compared: usize,
    /// Of them inside their interval.
    pub inside: usize,
}

/// A visual predictive check.
#[derive(Debug, Clone, Serialize)]
pub struct Vpc {
    /// Replicate studies simulated.
    pub replicates: usize,
    /// Their seed.
    pub seed: u64,
    /// The binning time.
    pub bin_by: String,
    /// Prediction-corrected.
    pub prediction_corrected: bool,
    /// Levels in the bins.
    pub levels: usize,
    /// Levels outside every bin (given edges), left out.
    pub left_out: usize,
    /// The observed percentiles in their interval.
    pub coverage: Coverage,
    /// The bins, in time order.
    pub bins: Vec<VpcBin>,
    /// What was chosen or left out, as text.
    pub notes: Vec<String>,
    /// The observed levels in the bins (for the plot).
    #[serde(skip)]
    pub observed: Vec<ObservedLevel>,
}

/// A level's place in the check: its bin and correction factor, and what a simulation needs.
struct Slot {
    bin: usize,
    /// The population prediction PRED_i.
    pred: f64,
    /// The prediction correction PRED_bin / PRED_i (1 without correction).
    factor: f64,
    lloq: Option<f64>,
}

/// A subject as the replicates simulate it: its typical parameters, doses and levels' times.
struct Design<'a> {
    subject: &'a SubjectData,
    typical: Params,
    times: Vec<f64>,
    /// One per level; `None` for a level outside every bin.
    slots: Vec<Option<Slot>>,
}

/// The subject's typical parameters (η = 0) under `model`.
fn typical(model: &PopulationModel, subject: &SubjectData) -> Result<Params, InputError> {
    let (cl, v) = model.typical_cl_v(&subject.covariates)?;
    let absorption = model.absorption.as_ref();
    Ok(Params {
        cl_l_h: cl,
        v_l: v,
        ka_per_h: absorption.map(|a| a.ka.typical),
        f: absorption.map_or(1.0, |a| a.f),
        tlag_h: absorption.map_or(0.0, |a| a.tlag_h),
    })
}

/// A value for ranking: a censored level is −∞, below every quantified one.
fn rankable(value: Option<f64>) -> f64 {
    value.unwrap_or(f64::NEG_INFINITY)
}

/// The nearest-rank `percent`-th percentile of `values` (sorted in place), `None` when its rank
/// falls on a censored value.
fn percentile(values: &mut [f64], percent: u32) -> Option<f64> {
    if values.is_empty() {
        return None;
    }
    values.sort_by(f64::total_cmp);
    let v = values[nearest_rank(values.len() as u64, percent) as usize - 1];
    v.is_finite().then_some(v)
}

/// The compared statistics of each bin from one data set (observed or simulated): the three
/// percentiles (−∞ below the limit) and the fraction below the limit.
fn statistics(values: &[(usize, f64)], bins: usize) -> Vec<[f64; 4]> {
    let mut by_bin: Vec<Vec<f64>> = vec![Vec::new(); bins];
    for &(b, v) in values {
        by_bin[b].push(v);
    }
    by_bin
        .iter_mut()
        .map(|v| {
            let censored = v.iter().filter(|x| !x.is_finite()).count() as f64 / v.len() as f64;
            let [a, b, c] = PERCENTILES.map(|p| rankable(percentile(v, p)));
            [a, b, c, censored]
        })
        .collect()
}

/// The levels of the designs with their bin, each value (observed or simulated) corrected.
fn binned(designs: &[Design], values: &[Vec<Option<f64>>]) -> Vec<(usize, f64)> {
    let mut out = Vec::new();
    for (d, vs) in designs.iter().zip(values) {
        for (slot, v) in d.slots.iter().zip(vs) {
            if let Some(s) = slot {
                out.push((s.bin, rankable(v.map(|v| v * s.factor))));
            }
        }
    }
    out
}

/// One replicate study's levels: each subject's η drawn, then each level's residual error; a
/// value below its level's limit is censored (`None`).
fn simulate(designs: &[Design], model: &PopulationModel, seed: u64) -> Vec<Vec<Option<f64>>> {
    let mut rng = StdRng::seed_from_u64(seed);
    let normal = Normal::standard();
    designs
        .iter()
        .map(|d| {
            let eta = model.draw_eta(&mut rng);
            let p = Params {
                cl_l_h: d.typical.cl_l_h * eta[0].exp(),
                v_l: d.typical.v_l * eta[1].exp(),
                ka_per_h: d.typical.ka_per_h.map(|ka| ka * eta[2].exp()),
                ..d.typical
            };
            let f = concentrations(&p, &d.subject.doses, &d.times);
            f.iter()
                .zip(&d.slots)
                .map(|(&f, slot)| {
                    let y = f + model.residual.variance(f).sqrt() * normal.sample(&mut rng);
                    let lloq = slot.as_ref().and_then(|s| s.lloq);
                    (!lloq.is_some_and(|l| y < l)).then_some(y)
                })
                .collect()
        })
        .collect()
}

/// The median of a non-empty slice (mean of the middle two for an even count).
fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    let n = values.len();
    if n % 2 == 1 { values[n / 2] } else { (values[n / 2 - 1] + values[n / 2]) / 2.0 }
}

/// The visual predictive check of `subjects` (with their levels) against `model`. Bad options
/// are reported against the option's name (`replicates`, `bins`).
pub fn vpc(
    subjects: &[SubjectData],
    model: &PopulationModel,
    options: &VpcOptions,
) -> Result<Vpc, InputError> {
    let total: usize = subjects.iter().map(|s| s.levels.len()).sum();
    if !(1..=MAX_REPLICATES).contains(&options.replicates) {
        return Err(InputError::field(
            "replicates",
            format!("expected 1 to {MAX_REPLICATES} replicates, found {}", options.replicates),
        ));
    }
    if options.replicates as u64 * total as u64 > MAX_SIMULATED {
        return Err(InputError::field(
            "replicates",
            format!(
                "{} replicates of {total} levels would simulate more than {MAX_SIMULATED} levels; ask for fewer",
                options.replicates
            ),
        ));
    }
    if let Bins::Edges(edges) = &options.bins {
        bins::check_edges(edges).map_err(|m| InputError::field("bins", m))?;
    }
    if total == 0 {
        return Err(InputError::field("levels", "the study has no levels to check"));
    }
    let x_of = |s: &SubjectData, t: f64| match options.bin_by {
        BinBy::Time => t,
        BinBy::TimeAfterDose => super::time_after_dose(s, t),
    };
    let xs: Vec<f64> =
        subjects.iter().flat_map(|s| s.levels.iter().map(move |l| x_of(s, l.time_h))).collect();
    let ranges = match &options.bins {
        Bins::Auto => bins::automatic(&xs),
        Bins::Edges(_) => Vec::new(),
    };
    let bin_of = |x: f64| match &options.bins {
        Bins::Auto => bins::by_ranges(&ranges, x),
        Bins::Edges(edges) => bins::by_edges(edges, x),
    };
    let mut designs = Vec::with_capacity(subjects.len());
    for s in subjects {
        let typical = typical(model, s)?;
        let times: Vec<f64> = s.levels.iter().map(|l| l.time_h).collect();
        let pred = concentrations(&typical, &s.doses, &times);
        let slots = s
            .levels
            .iter()
            .zip(&pred)
            .map(|(l, &pred)| {
                bin_of(x_of(s, l.time_h)).map(|bin| Slot { bin, pred, factor: 1.0, lloq: l.lloq_mg_l })
            })
            .collect();
        designs.push(Design { subject: s, typical, times, slots });
    }
    // Bins by their levels: empty ones (given edges) are left out and the rest numbered.
    let edge_count = match &options.bins {
        Bins::Auto => ranges.len(),
        Bins::Edges(e) => e.len() - 1,
    };
    let mut counts = vec![0usize; edge_count];
    designs.iter().flat_map(|d| d.slots.iter().flatten()).for_each(|s| counts[s.bin] += 1);
    let kept: Vec<usize> = (0..edge_count).filter(|&b| counts[b] > 0).collect();
    let mut number = vec![usize::MAX; edge_count];
    kept.iter().enumerate().for_each(|(i, &b)| number[b] = i);
    let mut notes = Vec::new();
    if kept.len() < edge_count {
        notes.push(format!("{} bin(s) without levels are left out", edge_count - kept.len()));
    }
    // Prediction correction: the factor PRED_bin / PRED_i (1 without correction; 1 for a
    // level whose PRED or bin median is not positive, said in a note).
    let mut preds: Vec<Vec<f64>> = vec![Vec::new(); kept.len()];
    for d in &mut designs {
        for s in d.slots.iter_mut().flatten() {
            s.bin = number[s.bin];
            preds[s.bin].push(s.pred);
        }
    }
    let medians: Vec<f64> = preds.iter_mut().map(|p| median(p)).collect();
    let mut uncorrected = 0;
    for s in designs.iter_mut().flat_map(|d| d.slots.iter_mut().flatten()) {
        let (pred, bin_pred) = (s.pred, medians[s.bin]);
        s.factor = if !options.prediction_corrected {
            1.0
        } else if pred > 0.0 && bin_pred > 0.0 {
            bin_pred / pred
        } else {
            uncorrected += 1;
            1.0
        };
    }
    if uncorrected > 0 {
        notes.push(format!(
            "{uncorrected} level(s) whose population prediction (or its bin's median) is 0 are not prediction-corrected"
        ));
    }
    let observed_values: Vec<Vec<Option<f64>>> =
        subjects.iter().map(|s| s.levels.iter().map(|l| l.conc_mg_l).collect()).collect();
    let observed = statistics(&binned(&designs, &observed_values), kept.len());
    let seeds = Seeds(options.seed);
    let replicates: Vec<Vec<[f64; 4]>> = (0..options.replicates as u64)
        .into_par_iter()
        .map(|r| {
            statistics(&binned(&designs, &simulate(&designs, model, seeds.vpc_replicate(r))), kept.len())
        })
        .collect();
    let compare = |b: usize, k: usize| {
        let mut over: Vec<f64> = replicates.iter().map(|r| r[b][k]).collect();
        let [lo, mid, hi] = PERCENTILES.map(|p| percentile(&mut over, p));
        let o = observed[b][k];
        Compared {
            observed: o.is_finite().then_some(o),
            simulated_lo: lo,
            simulated_median: mid,
            simulated_hi: hi,
        }
    };
    let mut levels_of: Vec<Vec<(f64, bool)>> = vec![Vec::new(); kept.len()];
    let mut points = Vec::new();
    for (d, s) in designs.iter().zip(subjects) {
        for (slot, l) in d.slots.iter().zip(&s.levels) {
            if let Some(slot) = slot {
                let x = x_of(s, l.time_h);
                levels_of[slot.bin].push((x, l.is_blq()));
                points.push(ObservedLevel {
                    x_h: x,
                    value_mg_l: l.conc_mg_l.map(|c| c * slot.factor),
                    lloq_mg_l: l.lloq_mg_l.map(|c| c * slot.factor),
                });
            }
        }
    }
    let bins: Vec<VpcBin> = kept
        .iter()
        .enumerate()
        .map(|(i, &b)| {
            let levels = &levels_of[i];
            let (from_h, to_h) = match &options.bins {
                Bins::Auto => (ranges[b][0], ranges[b][1]),
                Bins::Edges(e) => (e[b], e[b + 1]),
            };
            VpcBin {
                bin: i + 1,
                from_h,
                to_h,
                mid_h: levels.iter().map(|l| l.0).sum::<f64>() / levels.len() as f64,
                levels: levels.len(),
                blq: levels.iter().filter(|l| l.1).count(),
                p05_mg_l: compare(i, 0),
                p50_mg_l: compare(i, 1),
                p95_mg_l: compare(i, 2),
                blq_fraction: compare(i, 3),
            }
        })
        .collect();
    let in_bins: usize = bins.iter().map(|b| b.levels).sum();
    if in_bins < total {
        notes.push(format!("{} level(s) outside the bin edges are left out", total - in_bins));
    }
    let judged: Vec<bool> =
        bins.iter().flat_map(|b| b.percentiles().map(|(_, c)| c.inside())).flatten().collect();
    Ok(Vpc {
        replicates: options.replicates,
        seed: options.seed,
        bin_by: options.bin_by.to_string(),
        prediction_corrected: options.prediction_corrected,
        levels: in_bins,
        left_out: total - in_bins,
        coverage: Coverage { compared: judged.len(), inside: judged.iter().filter(|&&i| i).count() },
        bins,
        notes,
        observed: points,
    })
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // percentiles are sample values
mod tests {
    use super::*;

    #[test]
    fn censored_values_rank_below_every_level() {
        let mut v = vec![3.0, f64::NEG_INFINITY, 1.0, f64::NEG_INFINITY, 2.0];
        // Nearest rank among 5: 5th → rank 1, 50th → rank 3, 95th → rank 5.
        assert_eq!(percentile(&mut v, 5), None);
        assert_eq!(percentile(&mut v, 50), Some(1.0));
        assert_eq!(percentile(&mut v, 95), Some(3.0));
        assert_eq!(statistics(&[(0, 2.0), (0, f64::NEG_INFINITY)], 1)[0][3], 0.5);
    }
}
