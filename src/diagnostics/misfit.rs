//! Does the one-compartment model describe the levels? Tests on the residuals (observed −
//! individual prediction) ordered by time (docs/methods.md, section 12.4):
//!
//! - a **runs test** on their signs (Wald & Wolfowitz 1940; details not confirmed): too few runs
//!   (long blocks of levels on one side of the curve) mean a systematic misfit. Within a subject
//!   the runs R are compared with E(R) = 1 + 2n₊n₋/n, Var(R) = 2n₊n₋(2n₊n₋ − n)/(n²(n − 1));
//!   over the study R, E(R) and Var(R) are summed over the subjects;
//! - a **trend** of the residuals' signs against time after dose and against the individual
//!   prediction: Spearman's rank correlation ρ over the study, with z = ρ·√(N − 1) (common
//!   practice); signs, so that the weighting and the error model do not matter;
//! - a **serial correlation** of the residuals' sizes (our own rule, calibrated): within each
//!   subject with at least [`SUBJECT_MIN_LEVELS`] levels, the lag-1 autocorrelation r₁ of its
//!   residuals about their mean, z = (r₁ + 1/n)·√n (the large-sample moments of r₁ for
//!   independent values, common practice), combined over the subjects as Σz/√k (Stouffer's
//!   method, common practice). A two-exponential curve leaves smooth waves of residuals, which
//!   the runs test (signs only) reads weakly when the fit is weighted by the error model (map,
//!   wls with 1/y²) and the late, low levels' signs vary.
//!
//! The thresholds were calibrated by simulation (the `misfit_calibration` test; the rates are in
//! docs/methods.md).

use super::LevelDiagnostics;
use crate::warning::{Code, Warning};

/// The README section a misfit warning points to.
pub const README_SECTION: &str =
    "see the README, section \"When a one-compartment model is not appropriate\"";
/// Study-level runs test: warn when z < −RUNS_Z (one-sided p < 0.001).
pub const STUDY_RUNS_Z: f64 = 3.09;
/// Subject-level runs test: warn when z < −SUBJECT_RUNS_Z (one-sided p < 0.0005).
pub const SUBJECT_RUNS_Z: f64 = 3.29;
/// Trend tests: warn when |z| > TREND_Z (two-sided p < 0.001).
pub const TREND_Z: f64 = 3.29;
/// Serial-correlation test: warn when z > SERIAL_Z (one-sided nominal p < 0.025; with the runs
/// and the two trend tests the nominal levels add up to 2.8 %, within the 5 % the warning may
/// fire on data from the model itself).
pub const SERIAL_Z: f64 = 1.96;
/// Fewest quantified levels for a subject's own runs test and for its serial correlation.
pub const SUBJECT_MIN_LEVELS: usize = 8;

/// Runs, their expectation and variance for one sequence of signs.
fn runs(signs: &[bool]) -> (f64, f64, f64) {
    let n = signs.len() as f64;
    let plus = signs.iter().filter(|s| **s).count() as f64;
    let minus = n - plus;
    if plus == 0.0 || minus == 0.0 {
        return (1.0, 1.0, 0.0);
    }
    let r = 1.0 + signs.windows(2).filter(|w| w[0] != w[1]).count() as f64;
    let e = 1.0 + 2.0 * plus * minus / n;
    let v = 2.0 * plus * minus * (2.0 * plus * minus - n) / (n * n * (n - 1.0));
    (r, e, v)
}

/// The lag-1 autocorrelation r₁ of `residuals` (in time order) about their mean, and its z under
/// independence, (r₁ + 1/n)·√n; `None` when they are all equal.
fn serial(residuals: &[f64]) -> Option<(f64, f64)> {
    let n = residuals.len() as f64;
    let mean = residuals.iter().sum::<f64>() / n;
    let d: Vec<f64> = residuals.iter().map(|e| e - mean).collect();
    let ss: f64 = d.iter().map(|x| x * x).sum();
    let r1 = d.windows(2).map(|w| w[0] * w[1]).sum::<f64>() / ss;
    (ss > 0.0 && r1.is_finite()).then(|| (r1, (r1 + 1.0 / n) * n.sqrt()))
}

/// The residual of a quantified level: IWRES when there is one, else the raw residual.
fn residual(r: &LevelDiagnostics) -> Option<f64> {
    let raw = r.observed_mg_l? - r.ipred_mg_l;
    Some(r.iwres.unwrap_or(raw))
}

fn ranks(x: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..x.len()).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
    let mut rank = vec![0.0; x.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && x[order[j + 1]].total_cmp(&x[order[i]]).is_eq() {
            j += 1;
        }
        for k in i..=j {
            rank[order[k]] = (i + j) as f64 / 2.0;
        }
        i = j + 1;
    }
    rank
}

/// Spearman's ρ (Pearson's correlation of the ranks, ties at their mean rank).
fn spearman(x: &[f64], y: &[f64]) -> f64 {
    let (rx, ry) = (ranks(x), ranks(y));
    let n = x.len() as f64;
    let (mx, my) = (rx.iter().sum::<f64>() / n, ry.iter().sum::<f64>() / n);
    let sxy: f64 = rx.iter().zip(&ry).map(|(a, b)| (a - mx) * (b - my)).sum();
    let sxx: f64 = rx.iter().map(|a| (a - mx).powi(2)).sum();
    let syy: f64 = ry.iter().map(|b| (b - my).powi(2)).sum();
    if sxx > 0.0 && syy > 0.0 { sxy / (sxx * syy).sqrt() } else { 0.0 }
}

/// Where the residuals lean: the third of the levels (by time after dose) whose share above the
/// prediction is furthest from one half, as a phrase.
fn pattern(levels: &[(f64, f64)]) -> String {
    let mut by_time: Vec<&(f64, f64)> = levels.iter().collect();
    by_time.sort_by(|a, b| a.0.total_cmp(&b.0));
    let n = by_time.len();
    let thirds = [("early", 0, n / 3), ("mid-interval", n / 3, 2 * n / 3), ("late", 2 * n / 3, n)];
    let mut best: Option<(f64, String)> = None;
    for (name, a, b) in thirds {
        if b <= a {
            continue;
        }
        let above = by_time[a..b].iter().filter(|l| l.1 > 0.0).count();
        let share = above as f64 / (b - a) as f64;
        let phrase = format!(
            "{name} levels are {}-predicted ({above} of {} above the curve)",
            if share > 0.5 { "under" } else { "over" },
            b - a
        );
        if best.as_ref().is_none_or(|(d, _)| (share - 0.5).abs() > *d) {
            best = Some(((share - 0.5).abs(), phrase));
        }
    }
    best.map_or(String::new(), |b| b.1)
}

/// The quantified levels of `rows` as (time after dose, residual), in time order.
fn residuals(rows: &[LevelDiagnostics]) -> Vec<(f64, f64, f64)> {
    rows.iter().filter_map(|r| residual(r).map(|e| (r.time_after_dose_h, e, r.ipred_mg_l))).collect()
}

/// One subject's runs test (its rows, in time order).
pub fn subject(rows: &[LevelDiagnostics]) -> Option<Warning> {
    let levels = residuals(rows);
    if levels.len() < SUBJECT_MIN_LEVELS {
        return None;
    }
    let signs: Vec<bool> = levels.iter().map(|l| l.1 > 0.0).collect();
    let (r, e, v) = runs(&signs);
    let z = (r - e) / v.sqrt();
    (v > 0.0 && z < -SUBJECT_RUNS_Z).then(|| {
        let tr: Vec<(f64, f64)> = levels.iter().map(|l| (l.0, l.1)).collect();
        Warning::new(
            Code::ModelMisfit,
            format!(
                "the one-compartment model does not describe this subject's levels: residuals run in long \
                 blocks ({r:.0} runs where {e:.1} are expected): {}; {README_SECTION}",
                pattern(&tr)
            ),
        )
    })
}

/// The study's tests over every subject's rows (grouped by subject, each in time order).
pub fn study(rows: &[LevelDiagnostics]) -> Vec<Warning> {
    let mut groups: Vec<&[LevelDiagnostics]> = Vec::new();
    let mut start = 0;
    for i in 1..=rows.len() {
        if i == rows.len() || rows[i].subject != rows[start].subject {
            groups.push(&rows[start..i]);
            start = i;
        }
    }
    let (mut r, mut e, mut v) = (0.0, 0.0, 0.0);
    // Serial correlation: the sum of r₁ and of z over the k subjects long enough for it.
    let (mut r1, mut z1, mut k) = (0.0, 0.0, 0usize);
    let mut all = Vec::new();
    for g in groups {
        let levels = residuals(g);
        let signs: Vec<bool> = levels.iter().map(|l| l.1 > 0.0).collect();
        if signs.len() >= 2 {
            let (a, b, c) = runs(&signs);
            r += a;
            e += b;
            v += c;
        }
        if levels.len() >= SUBJECT_MIN_LEVELS {
            let sizes: Vec<f64> = levels.iter().map(|l| l.1).collect();
            if let Some((a, b)) = serial(&sizes) {
                r1 += a;
                z1 += b;
                k += 1;
            }
        }
        all.extend(levels);
    }
    let mut findings = Vec::new();
    let z_runs = if v > 0.0 { (r - e) / v.sqrt() } else { 0.0 };
    if z_runs < -STUDY_RUNS_Z {
        findings.push(format!("residuals run in long blocks ({r:.0} runs where {e:.1} are expected)"));
    }
    if k > 0 && z1 / (k as f64).sqrt() > SERIAL_Z {
        findings.push(format!(
            "neighbouring residuals lie on the same side of the curve (serial correlation {:.2})",
            r1 / k as f64
        ));
    }
    let n = all.len() as f64;
    if all.len() >= 10 {
        // Signs, not sizes: the test then does not depend on the weighting or the error model.
        let res: Vec<f64> = all.iter().map(|l| l.1.signum()).collect();
        let tad: Vec<f64> = all.iter().map(|l| l.0).collect();
        let pred: Vec<f64> = all.iter().map(|l| l.2).collect();
        for (what, x) in [("time after dose", &tad), ("the prediction", &pred)] {
            let rho = spearman(x, &res);
            if (rho * (n - 1.0).sqrt()).abs() > TREND_Z {
                findings.push(format!("residuals trend with {what} (rank correlation {rho:.2})"));
            }
        }
    }
    if findings.is_empty() {
        return Vec::new();
    }
    let tr: Vec<(f64, f64)> = all.iter().map(|l| (l.0, l.1)).collect();
    vec![Warning::new(
        Code::ModelMisfit,
        format!(
            "the one-compartment model does not describe these data: {}: {}; {README_SECTION}",
            findings.join("; "),
            pattern(&tr)
        ),
    )]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_count_and_moments() {
        // + + − − + : 3 runs; n₊ = 3, n₋ = 2: E = 1 + 12/5 = 3.4, Var = 12·(12 − 5)/(25·4) = 0.84.
        let (r, e, v) = runs(&[true, true, false, false, true]);
        assert!((r - 3.0).abs() < 1e-15 && (e - 3.4).abs() < 1e-12 && (v - 0.84).abs() < 1e-12);
    }

    #[test]
    fn serial_correlation_and_its_z() {
        // 1, 2, −1, −2 (mean 0): Σ d² = 10, Σ dᵢdᵢ₋₁ = 2 − 2 + 2 = 2, r₁ = 0.2;
        // z = (0.2 + 1/4)·√4 = 0.9.
        let (r1, z) = serial(&[1.0, 2.0, -1.0, -2.0]).unwrap();
        assert!((r1 - 0.2).abs() < 1e-15 && (z - 0.9).abs() < 1e-15);
        // About the mean: adding a constant changes nothing.
        let (r1, _) = serial(&[4.0, 5.0, 2.0, 1.0]).unwrap();
        assert!((r1 - 0.2).abs() < 1e-15);
        assert!(serial(&[3.0, 3.0, 3.0]).is_none());
    }

    #[test]
    fn spearman_of_a_monotone_relation_is_one() {
        let x = [1.0, 2.0, 3.0, 4.0];
        assert!((spearman(&x, &[1.0, 4.0, 9.0, 16.0]) - 1.0).abs() < 1e-15);
        assert!((spearman(&x, &[4.0, 3.0, 2.0, 1.0]) + 1.0).abs() < 1e-15);
    }
}
