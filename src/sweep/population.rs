//! Virtual subjects: drawn from a population model, or read from a table of individual
//! parameters.
//!
//! A drawn subject's between-subject variability follows the model (docs/methods.md): with
//! z = (z₁, z₂, z₃) independent standard normals, η = L·z where Ω = L·Lᵀ (Cholesky), so
//! η_CL = ω_CL·z₁, η_V = ω_V·(ρ·z₁ + √(1 − ρ²)·z₂) when only CL and V correlate; each
//! parameter is its typical value for the subject's covariates times e^η. Covariates are resampled uniformly with replacement from a
//! pool of real or invented subjects, or drawn from stated distributions. Every draw of
//! subject i comes from its own generator seeded with `Seeds(seed).virtual_subject(i)`, so a subject is the
//! same whatever the thread count, the chunking or the shard it falls in.

use crate::covariates::{Covariates, Sex};
use crate::engine::Params;
use crate::error::InputError;
use crate::io::table::{Column, Table};
use crate::model::PopulationModel;
use crate::seeds::Seeds;
use crate::units::Kind;
use rand::rngs::StdRng;
use rand::{Rng, RngExt, SeedableRng};
use statrs::distribution::{ContinuousCDF, Normal};
use std::fmt::Write as _;

/// The smallest share of a distribution a truncation range may keep.
const MIN_KEPT: f64 = 1e-3;

/// How one covariate is drawn.
#[derive(Debug, Clone, PartialEq)]
enum Dist {
    /// The same value for every subject.
    Fixed(f64),
    /// The normal `n` truncated to [lo, hi] (lo ≥ 0).
    Normal { n: Normal, lo: f64, hi: f64 },
    /// ln X has the normal `n`; X is truncated to [lo, hi].
    LogNormal { n: Normal, lo: f64, hi: f64 },
    /// Uniform on [lo, hi].
    Uniform { lo: f64, hi: f64 },
    /// Female with this probability, otherwise male.
    Female(f64),
}

/// One covariate drawn from a stated distribution (`--draw weight_kg=normal:75:12`).
#[derive(Debug, Clone, PartialEq)]
pub struct CovariateDraw {
    /// The covariate (`weight_kg`, `sex`).
    pub name: String,
    dist: Dist,
}

/// A draw in (0, 1), never exactly 0 or 1, so inverse CDFs stay finite.
fn open_unit(rng: &mut impl Rng) -> f64 {
    ((rng.random::<u64>() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
}

/// The `u`-quantile of the normal `n` conditioned on lo ≤ X ≤ hi (inverting the CDF over the
/// kept mass).
fn truncated(n: &Normal, lo: f64, hi: f64, u: f64) -> f64 {
    let (a, b) = (n.cdf(lo), n.cdf(hi));
    n.inverse_cdf(a + (b - a) * u).clamp(lo, hi)
}

impl CovariateDraw {
    /// The value at `u` in (0, 1): the inverse CDF, or for sex 1 (female) when u < P.
    fn quantile(&self, u: f64) -> f64 {
        match &self.dist {
            Dist::Fixed(x) => *x,
            Dist::Normal { n, lo, hi } => truncated(n, *lo, *hi, u),
            Dist::LogNormal { n, lo, hi } => truncated(n, lo.ln(), hi.ln(), u).exp().clamp(*lo, *hi),
            Dist::Uniform { lo, hi } => lo + (hi - lo) * u,
            Dist::Female(p) => f64::from(u8::from(u < *p)),
        }
    }

    fn draw(&self, rng: &mut impl Rng) -> f64 {
        self.quantile(open_unit(rng))
    }

    /// A central value, to check once that the draws give the model what it needs.
    fn central(&self) -> f64 {
        self.quantile(0.5)
    }

    fn apply(&self, value: f64, cov: &mut Covariates) {
        if matches!(self.dist, Dist::Female(_)) {
            cov.sex = Some(if value > 0.5 { Sex::Female } else { Sex::Male });
        } else {
            cov.set(&self.name, value);
        }
    }
}

/// Parse a number in a draw specification.
fn number(text: &str, what: &str) -> Result<f64, String> {
    match text.trim().parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => Err(format!("expected a number for the {what}, found '{text}'")),
    }
}

/// An optional truncation range `LO..HI` (either side may be empty) within [0, ∞).
fn truncation(part: Option<&str>) -> Result<(f64, f64), String> {
    let Some(text) = part else { return Ok((0.0, f64::INFINITY)) };
    let (lo, hi) = text
        .split_once("..")
        .ok_or_else(|| format!("expected a range LO..HI after the parameters, found '{text}'"))?;
    let lo = if lo.trim().is_empty() { 0.0 } else { number(lo, "lower bound")? };
    let hi = if hi.trim().is_empty() { f64::INFINITY } else { number(hi, "upper bound")? };
    if !(lo >= 0.0 && hi > lo) {
        return Err(format!("expected a range with 0 <= LO < HI, found '{text}'"));
    }
    Ok((lo, hi))
}

/// Parse `NAME=SPEC`: a fixed value (`age_y=65`), `normal:MEAN:SD`, `lognormal:MEDIAN:CV` or
/// `uniform:LO:HI`, the first two optionally truncated (`normal:75:12:40..150`; by default to
/// positive values), and for sex `sex=F:0.5` (female with probability 0.5), `sex=M:0.6` or
/// `sex=F`.
pub fn parse_draw(spec: &str) -> Result<CovariateDraw, String> {
    let (name, value) = spec
        .split_once('=')
        .ok_or_else(|| format!("expected NAME=DISTRIBUTION (e.g. weight_kg=normal:75:12), found '{spec}'"))?;
    let name = name.trim().to_string();
    if name.is_empty() {
        return Err(format!("the covariate name is missing in '{spec}'"));
    }
    let parts: Vec<&str> = value.split(':').map(str::trim).collect();
    let dist = if name == "sex" {
        let p = match parts.get(1) {
            Some(p) => number(p, "probability")?,
            None => 1.0,
        };
        if parts.len() > 2 || !(0.0..=1.0).contains(&p) {
            return Err(format!("expected sex=F:P or sex=M:P with 0 <= P <= 1, found '{spec}'"));
        }
        match parts[0].to_ascii_uppercase().as_str() {
            "F" => Dist::Female(p),
            "M" => Dist::Female(1.0 - p),
            other => return Err(format!("expected F or M for sex, found '{other}'")),
        }
    } else {
        let arity = |n: usize| {
            if parts.len() == n || parts.len() == n + 1 {
                Ok(())
            } else {
                Err(format!("'{}' takes {} parameters, found '{value}'", parts[0], n - 1))
            }
        };
        match parts[0] {
            "normal" => {
                arity(3)?;
                let (mean, sd) = (number(parts[1], "mean")?, number(parts[2], "standard deviation")?);
                let (lo, hi) = truncation(parts.get(3).copied())?;
                let n = Normal::new(mean, sd)
                    .map_err(|_| format!("the standard deviation must be positive, found {sd}"))?;
                let kept = n.cdf(hi) - n.cdf(lo);
                if kept < MIN_KEPT {
                    return Err(format!("the range {lo}..{hi} keeps only {kept:.2e} of '{value}'; widen it"));
                }
                Dist::Normal { n, lo, hi }
            }
            "lognormal" => {
                arity(3)?;
                let (median, cv) = (number(parts[1], "median")?, number(parts[2], "CV")?);
                let (lo, hi) = truncation(parts.get(3).copied())?;
                if !(median > 0.0 && cv > 0.0) {
                    return Err(format!("lognormal needs a positive median and CV, found '{value}'"));
                }
                // ln X ~ N(ln median, ln(1 + CV²)), as the model's parameters.
                let n = Normal::new(median.ln(), (cv * cv).ln_1p().sqrt())
                    .map_err(|e| format!("lognormal:{median}:{cv}: {e}"))?;
                let kept = n.cdf(hi.ln()) - n.cdf(lo.ln());
                if kept < MIN_KEPT {
                    return Err(format!("the range {lo}..{hi} keeps only {kept:.2e} of '{value}'; widen it"));
                }
                Dist::LogNormal { n, lo, hi }
            }
            "uniform" => {
                if parts.len() != 3 {
                    return Err(format!("expected uniform:LO:HI, found '{value}'"));
                }
                let (lo, hi) = (number(parts[1], "lower bound")?, number(parts[2], "upper bound")?);
                if !(lo >= 0.0 && hi > lo) {
                    return Err(format!("expected uniform:LO:HI with 0 <= LO < HI, found '{value}'"));
                }
                Dist::Uniform { lo, hi }
            }
            _ if parts.len() == 1 => {
                let x = number(parts[0], "value")?;
                if x < 0.0 {
                    return Err(format!("covariates are non-negative, found {x}"));
                }
                Dist::Fixed(x)
            }
            other => {
                return Err(format!(
                    "unknown distribution '{other}': expected normal, lognormal, uniform or a number"
                ));
            }
        }
    };
    Ok(CovariateDraw { name, dist })
}

/// Where drawn subjects' covariates come from.
#[derive(Debug, Clone, PartialEq)]
pub enum CovariateSource {
    /// Nowhere: the model uses no covariates.
    None,
    /// Resampled uniformly, with replacement, from these subjects (id, covariates).
    Pool(Vec<(String, Covariates)>),
    /// Drawn from these distributions, in order.
    Draws(Vec<CovariateDraw>),
}

/// Typical CL and V for one set of covariates, after deriving those the model needs.
fn typical(model: &PopulationModel, cov: &mut Covariates, wanted: &[&str]) -> Result<(f64, f64), String> {
    cov.derive(wanted).and_then(|()| model.typical_cl_v(cov)).map_err(|e| e.describe())
}

#[derive(Debug, Clone)]
enum Covs {
    /// Typical CL and V without covariates.
    Constant(f64, f64),
    /// Pool subjects' ids with their typical CL and V.
    Pool(Vec<(String, f64, f64)>),
    Draws {
        draws: Vec<CovariateDraw>,
        needed: Vec<String>,
    },
}

#[derive(Debug, Clone)]
enum Source {
    Model { model: Box<PopulationModel>, covariates: Covs },
    Table(ParamRows),
}

/// Subjects given by their parameters, in order: the ids in one text, so that a table of
/// hundreds of thousands of subjects is read without an allocation per subject.
#[derive(Debug, Clone, Default)]
pub struct ParamRows {
    ids: String,
    /// Where each id ends in `ids`.
    ends: Vec<usize>,
    params: Vec<Params>,
}

impl ParamRows {
    /// Add a subject.
    pub fn push(&mut self, id: &str, params: Params) {
        self.ids.push_str(id);
        self.ends.push(self.ids.len());
        self.params.push(params);
    }

    /// The number of subjects.
    pub fn len(&self) -> usize {
        self.params.len()
    }

    /// No subjects.
    pub fn is_empty(&self) -> bool {
        self.params.is_empty()
    }

    /// Subject `i` (from 0): its id and parameters.
    pub fn get(&self, i: usize) -> Option<(&str, Params)> {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        Some((&self.ids[start..*self.ends.get(i)?], *self.params.get(i)?))
    }
}

/// A virtual population.
#[derive(Debug, Clone)]
pub struct Population(Source);

/// One virtual subject.
#[derive(Debug, Clone, Copy)]
pub struct Subject<'a> {
    /// Individual parameters.
    pub params: Params,
    /// The pool subject whose covariates were drawn, or the table row's subject.
    pub origin: Option<&'a str>,
}

impl Population {
    /// Subjects drawn from `model`. Checks once that the covariates give the model what it
    /// needs; errors name the pool subject or the missing covariate.
    pub fn from_model(model: PopulationModel, source: CovariateSource) -> Result<Population, String> {
        let needed: Vec<String> = model.covariates_needed().iter().map(|s| s.to_string()).collect();
        let wanted: Vec<&str> = needed.iter().map(String::as_str).collect();
        let covariates = match source {
            CovariateSource::None if needed.is_empty() => {
                let (cl, v) = typical(&model, &mut Covariates::default(), &[])?;
                Covs::Constant(cl, v)
            }
            CovariateSource::None => {
                return Err(format!(
                    "the model uses the covariates {}: give a pool of subjects (--covariates) or \
                     distributions (--draw)",
                    needed.join(", ")
                ));
            }
            CovariateSource::Pool(pool) => {
                if pool.is_empty() {
                    return Err("the covariate pool has no subjects".into());
                }
                let mut out = Vec::with_capacity(pool.len());
                for (id, mut cov) in pool {
                    let (cl, v) =
                        typical(&model, &mut cov, &wanted).map_err(|m| format!("subject {id}: {m}"))?;
                    out.push((id, cl, v));
                }
                Covs::Pool(out)
            }
            CovariateSource::Draws(draws) => {
                let mut cov = Covariates::default();
                draws.iter().for_each(|d| d.apply(d.central(), &mut cov));
                typical(&model, &mut cov, &wanted)?;
                Covs::Draws { draws, needed }
            }
        };
        Ok(Population(Source::Model { model: Box::new(model), covariates }))
    }

    /// Subjects given by their individual parameters, one per row, in order.
    pub fn from_params(rows: ParamRows) -> Population {
        Population(Source::Table(rows))
    }

    /// Subject `index` for `seed`: the same whatever else is computed around it.
    pub fn subject(&self, seed: u64, index: u64) -> Result<Subject<'_>, String> {
        let (model, covariates) = match &self.0 {
            Source::Table(rows) => {
                let (id, params) = rows.get(index as usize).ok_or_else(|| {
                    format!("subject {} is beyond the table's {} rows", index + 1, rows.len())
                })?;
                return Ok(Subject { params, origin: Some(id) });
            }
            Source::Model { model, covariates } => (model, covariates),
        };
        let mut rng = StdRng::seed_from_u64(Seeds(seed).virtual_subject(index));
        let eta = model.draw_eta(&mut rng);
        let (eta_cl, eta_v) = (eta[0], eta[1]);
        let absorption = model.absorption.as_ref().map(|a| (a.ka.typical * eta[2].exp(), a.f, a.tlag_h));
        let (cl_typ, v_typ, origin) = match covariates {
            Covs::Constant(cl, v) => (*cl, *v, None),
            Covs::Pool(pool) => {
                let (id, cl, v) = &pool[rng.random_range(0..pool.len())];
                (*cl, *v, Some(id.as_str()))
            }
            Covs::Draws { draws, needed } => {
                let mut cov = Covariates::default();
                draws.iter().for_each(|d| d.apply(d.draw(&mut rng), &mut cov));
                let wanted: Vec<&str> = needed.iter().map(String::as_str).collect();
                let (cl, v) =
                    typical(model, &mut cov, &wanted).map_err(|m| format!("subject {}: {m}", index + 1))?;
                (cl, v, None)
            }
        };
        let (ka, f, tlag_h) = match absorption {
            Some((ka, f, tlag)) => (Some(ka), f, tlag),
            None => (None, 1.0, 0.0),
        };
        let params =
            Params { cl_l_h: cl_typ * eta_cl.exp(), v_l: v_typ * eta_v.exp(), ka_per_h: ka, f, tlag_h };
        Ok(Subject { params, origin })
    }
}

/// Find the `<quantity>_<unit>` column for `quantity` among columns that may carry more after
/// the unit (`cl_l_h_se` in the output of `cistern fit` is not the clearance).
fn exact_unit_column(table: &Table, quantity: &str, kind: Kind) -> Result<Option<Column>, InputError> {
    let mut found: Option<Column> = None;
    for (index, h) in table.headers.iter().enumerate() {
        let lower = h.to_ascii_lowercase();
        let Some(factor) =
            lower.strip_prefix(quantity).and_then(|r| r.strip_prefix('_')).and_then(|u| kind.factor(u))
        else {
            continue;
        };
        if let Some(prev) = &found {
            return Err(InputError::in_file(
                &table.source,
                format!("columns '{}' and '{h}' both give the {kind}; keep one", prev.name),
            )
            .at_line(table.header_line)
            .in_column(h.clone()));
        }
        found = Some(Column { index, name: h.clone(), factor, kind: Some(kind) });
    }
    Ok(found)
}

/// Individual parameters read from a table: one row per subject with `cl_<unit>` and
/// `v_<unit>`, optional `ka_<unit>` (needed when `need_ka`), optional `subject`, and an
/// optional `converged` column (rows with `false` are left out, with a note). Other columns
/// are ignored, so the CSV output of `cistern fit` reads as it is. Oral subjects take `f` and
/// `tlag_h`. Returns the rows and notes.
pub fn parse_params(
    table: &Table,
    need_ka: bool,
    f: f64,
    tlag_h: f64,
) -> Result<(ParamRows, Vec<String>), Vec<InputError>> {
    let src = table.source.as_str();
    let mut errors = Vec::new();
    let mut find =
        |q: &str, k: Kind| exact_unit_column(table, q, k).map_err(|e| errors.push(e)).ok().flatten();
    let (cl, v, ka) = (find("cl", Kind::Clearance), find("v", Kind::Volume), find("ka", Kind::RateConstant));
    if !errors.is_empty() {
        return Err(errors);
    }
    let missing = |what: &str| vec![InputError::in_file(src, what).at_line(table.header_line)];
    let (Some(cl), Some(v)) = (cl, v) else {
        return Err(missing("a parameters file needs a clearance column (cl_l_h) and a volume column (v_l)"));
    };
    if need_ka && ka.is_none() {
        return Err(missing("oral candidates need an absorption rate constant column (ka_per_h)"));
    }
    let subject = table.subject_column().map_err(|e| vec![e])?;
    let converged = table.column("converged");
    let mut rows = ParamRows::default();
    let mut left_out = Vec::new();
    // The id of a row without one, `row N`, made in a reused string.
    let mut numbered = String::new();
    for (n, row) in table.rows.iter().enumerate() {
        let id = match &subject {
            Some(c) if !row.text(c).is_empty() => row.text(c),
            _ => {
                numbered.clear();
                let _ = write!(numbered, "row {}", n + 1);
                &numbered
            }
        };
        if converged.as_ref().is_some_and(|c| row.text(c).eq_ignore_ascii_case("false")) {
            left_out.push(id.to_string());
            continue;
        }
        let mut positive = |c: &Column| match row.number(src, c) {
            Ok(x) if x > 0.0 => Some(x),
            Ok(x) => {
                errors.push(row.error(src, Some(c), format!("expected a positive value, found {x}")));
                None
            }
            Err(e) => {
                errors.push(e);
                None
            }
        };
        let (cl_l_h, v_l) = (positive(&cl), positive(&v));
        let ka_per_h = match &ka {
            Some(c) if need_ka || !row.text(c).is_empty() => positive(c).map(Some),
            _ => Some(None),
        };
        if let (Some(cl_l_h), Some(v_l), Some(ka_per_h)) = (cl_l_h, v_l, ka_per_h) {
            rows.push(id, Params { cl_l_h, v_l, ka_per_h, f, tlag_h });
        }
    }
    if !errors.is_empty() {
        return Err(errors);
    }
    if rows.is_empty() {
        return Err(missing("no subject is left: every row has converged = false"));
    }
    let mut notes = Vec::new();
    if !left_out.is_empty() {
        notes.push(format!(
            "{src}: left out {} subjects whose fit did not converge: {}",
            left_out.len(),
            left_out.join(", ")
        ));
    }
    Ok((rows, notes))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn draw_specifications_parse_and_refuse_nonsense() {
        let d = parse_draw("weight_kg=normal:75:12").unwrap();
        assert!(matches!(d.dist, Dist::Normal { lo, hi, .. } if lo.abs() < 1e-300 && hi.is_infinite()));
        assert!(matches!(parse_draw("age_y=65").unwrap().dist, Dist::Fixed(_)));
        assert!(matches!(parse_draw("sex=M:0.6").unwrap().dist, Dist::Female(p) if (p - 0.4).abs() < 1e-15));
        assert!(parse_draw("weight_kg=normal:75").unwrap_err().contains("takes 2 parameters"));
        assert!(parse_draw("weight_kg=normal:75:-1").is_err());
        assert!(parse_draw("weight_kg=normal:75:12:200..300").unwrap_err().contains("widen"));
        assert!(parse_draw("weight_kg=gamma:2:3").unwrap_err().contains("unknown distribution"));
        assert!(parse_draw("sex=X:0.5").is_err());
        assert!(parse_draw("uniform:1:2").is_err());
    }

    /// Sample mean and standard deviation of `n` draws.
    fn moments(d: &CovariateDraw, n: usize) -> (f64, f64) {
        let mut rng = StdRng::seed_from_u64(5);
        let x: Vec<f64> = (0..n).map(|_| d.draw(&mut rng)).collect();
        let mean = x.iter().sum::<f64>() / n as f64;
        let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1) as f64;
        (mean, var.sqrt())
    }

    #[test]
    fn draws_have_the_stated_distributions() {
        let n = 40_000;
        // normal:75:12: the truncation at 0 removes 2e-10 of the mass, so mean 75 and SD 12
        // hold; tolerance 4 standard errors (SE of the mean 12/√n, of the SD ≈ 12/√(2n)).
        let (mean, sd) = moments(&parse_draw("w=normal:75:12").unwrap(), n);
        assert!((mean - 75.0).abs() < 4.0 * 12.0 / (n as f64).sqrt(), "{mean}");
        assert!((sd - 12.0).abs() < 4.0 * 12.0 / (2.0 * n as f64).sqrt(), "{sd}");
        // lognormal:MEDIAN:CV has mean median·√(1 + CV²) and CV of the values CV (exact
        // identities of the log-normal: E X = e^(μ + σ²/2), CV² = e^(σ²) − 1).
        let (mean, sd) = moments(&parse_draw("s=lognormal:1:0.3").unwrap(), n);
        let want = (1.0f64 + 0.09).sqrt();
        assert!((mean - want).abs() < 4.0 * 0.3 * want / (n as f64).sqrt(), "{mean} vs {want}");
        // The sample CV's SE is about CV·√((1 + 2CV²)/(2n)) = 0.0012 (normal-theory
        // approximation; the log-normal's heavier tail makes it somewhat larger): 5 SE.
        assert!((sd / mean - 0.3).abs() < 5.0 * 0.3 * (1.18 / (2.0 * n as f64)).sqrt(), "CV {}", sd / mean);
        // uniform:40:90 has mean 65 and SD σ = 50/√12; the sample SD's SE is σ·√((κ − 1)/(4n))
        // with kurtosis κ = 1.8. sex=F:0.3 gives 30 % women.
        let (mean, sd) = moments(&parse_draw("a=uniform:40:90").unwrap(), n);
        let sigma = 50.0 / 12f64.sqrt();
        assert!((mean - 65.0).abs() < 4.0 * sigma / (n as f64).sqrt(), "{mean}");
        assert!((sd - sigma).abs() < 4.0 * sigma * (0.8 / (4.0 * n as f64)).sqrt(), "{sd}");
        let (share, _) = moments(&parse_draw("sex=F:0.3").unwrap(), n);
        assert!((share - 0.3).abs() < 4.0 * (0.3f64 * 0.7 / n as f64).sqrt(), "{share}");
    }

    #[test]
    fn truncated_draws_stay_in_range() {
        let d = parse_draw("scr_mg_dl=lognormal:1:0.8:0.4..4").unwrap();
        let mut rng = StdRng::seed_from_u64(3);
        for _ in 0..10_000 {
            let x = d.draw(&mut rng);
            assert!((0.4..=4.0).contains(&x), "{x}");
        }
    }
}
