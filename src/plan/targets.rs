//! Targets (what a regimen should achieve) and safety limits (what it must not do).
//!
//! A target is `METRIC=LO..HI` with either bound optional and units allowed on the bounds:
//! `auc24=400..600`, `trough=10..20mg/l`, `peak=..40`, `cavg=8..`, `auc_day2=300..`
//! (AUC over the second day from the start of therapy), and `above=2mg/l..` — the share of
//! the dosing interval at steady state with the concentration in the window (2 mg/L and up);
//! by default the whole interval, or at least a stated share with `above=2mg/l..@60%`.

use crate::error::InputError;
use crate::units::{Kind, parse_value};
use serde::{Deserialize, Serialize};
use std::fmt;

/// What a target is about.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case", tag = "metric")]
pub enum Metric {
    /// AUC over 24 h at steady state (mg·h/L).
    Auc24,
    /// AUC over day `day` (1-based) from the start of therapy (mg·h/L).
    AucDay {
        /// The day, 1 = the first 24 h of therapy.
        day: u32,
    },
    /// Steady-state trough (mg/L).
    Trough,
    /// Steady-state peak (mg/L).
    Peak,
    /// Steady-state average concentration (mg/L).
    Cavg,
    /// Share of the steady-state interval (%) with the concentration in [lo, hi] mg/L.
    Above {
        /// Lower edge of the window (mg/L).
        lo_mg_l: f64,
        /// Upper edge (mg/L); infinite when open.
        hi_mg_l: f64,
    },
}

/// One target: the metric must lie in [lo, hi].
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Target {
    /// The metric.
    #[serde(flatten)]
    pub metric: Metric,
    /// Lower bound (metric units), if any.
    pub lo: Option<f64>,
    /// Upper bound, if any.
    pub hi: Option<f64>,
}

impl Metric {
    /// The unit of the metric's values, for messages that print one.
    pub fn unit(&self) -> &'static str {
        match self {
            Metric::Auc24 | Metric::AucDay { .. } => "mg·h/L",
            Metric::Trough | Metric::Peak | Metric::Cavg => "mg/L",
            Metric::Above { .. } => "% of the interval",
        }
    }
}

impl Target {
    /// Whether `value` meets the target.
    pub fn met(&self, value: f64) -> bool {
        self.lo.is_none_or(|lo| value >= lo) && self.hi.is_none_or(|hi| value <= hi)
    }

    /// The metric's name as written on the command line.
    pub fn name(&self) -> String {
        match self.metric {
            Metric::Auc24 => "auc24".into(),
            Metric::AucDay { day } => format!("auc_day{day}"),
            Metric::Trough => "trough".into(),
            Metric::Peak => "peak".into(),
            Metric::Cavg => "cavg".into(),
            Metric::Above { .. } => "above".into(),
        }
    }

    /// Whether the metric depends on the dose history (not only on the steady state).
    pub fn needs_history(&self) -> bool {
        matches!(self.metric, Metric::AucDay { .. })
    }
}

impl fmt::Display for Target {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let bound = |b: Option<f64>| b.map(|x| format!("{x}")).unwrap_or_default();
        match self.metric {
            Metric::Above { lo_mg_l, hi_mg_l } => {
                let hi = if hi_mg_l.is_finite() { format!("{hi_mg_l}") } else { String::new() };
                write!(f, "above={lo_mg_l}..{hi} mg/L for at least {}% of the interval", bound(self.lo))
            }
            _ => write!(f, "{}={}..{}", self.name(), bound(self.lo), bound(self.hi)),
        }
    }
}

/// Split `LO..HI` and parse each side as a `kind` value; empty sides are open.
fn range(text: &str, kind: Kind) -> Result<(Option<f64>, Option<f64>), String> {
    let (lo, hi) = text
        .split_once("..")
        .ok_or_else(|| format!("expected LO..HI (either side may be empty), found '{text}'"))?;
    let side = |s: &str| -> Result<Option<f64>, String> {
        if s.trim().is_empty() { Ok(None) } else { parse_value(kind, s).map(Some) }
    };
    let (lo, hi) = (side(lo)?, side(hi)?);
    if lo.is_none() && hi.is_none() {
        return Err(format!("give at least one bound in '{text}'"));
    }
    if let (Some(l), Some(h)) = (lo, hi)
        && l > h
    {
        return Err(format!("the lower bound is above the upper bound in '{text}'"));
    }
    Ok((lo, hi))
}

/// Parse one `--target` specification.
pub fn parse_target(spec: &str) -> Result<Target, String> {
    let (name, value) = spec
        .split_once('=')
        .ok_or_else(|| format!("expected METRIC=LO..HI (e.g. auc24=400..600), found '{spec}'"))?;
    let name = name.trim().to_ascii_lowercase();
    let target = |metric, (lo, hi)| Target { metric, lo, hi };
    let parsed = match name.as_str() {
        "auc24" => target(Metric::Auc24, range(value, Kind::Auc)?),
        "trough" => target(Metric::Trough, range(value, Kind::Concentration)?),
        "peak" => target(Metric::Peak, range(value, Kind::Concentration)?),
        "cavg" => target(Metric::Cavg, range(value, Kind::Concentration)?),
        "above" => {
            let (window, share) = match value.split_once('@') {
                Some((w, s)) => {
                    let s = s.trim().trim_end_matches('%');
                    let pct: f64 =
                        s.parse().map_err(|_| format!("expected a percentage after '@', found '{s}'"))?;
                    if !(pct > 0.0 && pct <= 100.0) {
                        return Err(format!("the share of the interval must be in (0, 100] %, found {pct}"));
                    }
                    (w, pct)
                }
                None => (value, 100.0),
            };
            let (lo, hi) = range(window, Kind::Concentration)?;
            target(
                Metric::Above { lo_mg_l: lo.unwrap_or(0.0), hi_mg_l: hi.unwrap_or(f64::INFINITY) },
                (Some(share), None),
            )
        }
        other => match other.strip_prefix("auc_day").map(str::parse::<u32>) {
            Some(Ok(day)) if day >= 1 => target(Metric::AucDay { day }, range(value, Kind::Auc)?),
            _ => {
                return Err(format!(
                    "unknown target '{other}': expected auc24, auc_day<N>, trough, peak, cavg or above"
                ));
            }
        },
    };
    Ok(parsed)
}

/// Safety limits. Dose limits are checked on the regimen itself; exposure limits on the
/// predicted exposure, where a candidate breaks the limit when the probability of exceeding
/// it is above `max_risk`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Limits {
    /// Largest single dose (mg).
    pub max_dose_mg: Option<f64>,
    /// Largest total over 24 h (mg).
    pub max_daily_mg: Option<f64>,
    /// Fastest infusion (mg/h; given on the command line in mg/min as well).
    pub max_rate_mg_h: Option<f64>,
    /// Highest acceptable steady-state peak (mg/L).
    pub max_peak_mg_l: Option<f64>,
    /// Highest acceptable steady-state trough (mg/L).
    pub max_trough_mg_l: Option<f64>,
    /// Shortest dosing interval (h).
    pub min_every_h: Option<f64>,
    /// Largest acceptable probability of exceeding an exposure limit.
    pub max_risk: f64,
}

/// The acceptable probability of exceeding an exposure limit when none is stated.
pub const DEFAULT_MAX_RISK: f64 = 0.1;

impl Default for Limits {
    /// No limits, and the default acceptable risk [`DEFAULT_MAX_RISK`].
    fn default() -> Limits {
        Limits {
            max_dose_mg: None,
            max_daily_mg: None,
            max_rate_mg_h: None,
            max_peak_mg_l: None,
            max_trough_mg_l: None,
            min_every_h: None,
            max_risk: DEFAULT_MAX_RISK,
        }
    }
}

impl Limits {
    /// Contradictions among the limits themselves, each reported against its field
    /// (`max_dose_mg`, …; `limits` for two limits that contradict each other).
    pub fn validate(&self) -> Result<(), InputError> {
        let positive = [
            ("max_dose_mg", "the largest dose", self.max_dose_mg, "mg"),
            ("max_daily_mg", "the largest daily dose", self.max_daily_mg, "mg"),
            ("max_rate_mg_h", "the fastest infusion rate", self.max_rate_mg_h, "mg/h"),
            ("max_peak_mg_l", "the highest peak", self.max_peak_mg_l, "mg/L"),
            ("max_trough_mg_l", "the highest trough", self.max_trough_mg_l, "mg/L"),
            ("min_every_h", "the shortest interval", self.min_every_h, "h"),
        ];
        for (field, what, v, unit) in positive {
            if let Some(v) = v
                && !(v.is_finite() && v > 0.0)
            {
                return Err(InputError::field(field, format!("{what} must be positive, found {v} {unit}")));
            }
        }
        if let (Some(t), Some(p)) = (self.max_trough_mg_l, self.max_peak_mg_l)
            && t > p
        {
            return Err(InputError::field(
                "limits",
                format!(
                    "the highest trough ({t} mg/L) is above the highest peak ({p} mg/L): the limits contradict each other"
                ),
            ));
        }
        if !(0.0..1.0).contains(&self.max_risk) {
            return Err(InputError::field(
                "max_risk",
                format!("the largest acceptable risk must be in [0, 1), found {}", self.max_risk),
            ));
        }
        Ok(())
    }

    /// Targets that no regimen can meet within these limits, reported against the targets.
    pub fn conflicts_with(&self, targets: &[Target]) -> Result<(), InputError> {
        for t in targets {
            let (limit, what) = match t.metric {
                Metric::Trough => (self.max_trough_mg_l, "the highest trough"),
                Metric::Peak | Metric::Cavg => (self.max_peak_mg_l, "the highest peak"),
                _ => (None, ""),
            };
            if let (Some(limit), Some(lo)) = (limit, t.lo)
                && lo > limit
            {
                return Err(InputError::field(
                    "targets",
                    format!("the target {t} asks for more than {what} allowed ({limit} mg/L)"),
                ));
            }
        }
        Ok(())
    }
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // parsed values are exact
mod tests {
    use super::*;

    #[test]
    fn targets_parse_with_units_and_open_bounds() {
        let t = parse_target("auc24=400..600").unwrap();
        assert_eq!((t.metric, t.lo, t.hi), (Metric::Auc24, Some(400.0), Some(600.0)));
        let t = parse_target("trough=10..").unwrap();
        assert_eq!((t.lo, t.hi), (Some(10.0), None));
        let t = parse_target("peak=..40000ng/ml").unwrap();
        assert_eq!(t.hi, Some(40.0));
        assert_eq!(parse_target("auc24=400mg*h/l..0.6g.h/l").unwrap().hi, Some(600.0));
        assert!(parse_target("auc24=400mg/l..").unwrap_err().contains("unknown AUC unit"));
        let t = parse_target("auc_day2=300..").unwrap();
        assert_eq!(t.metric, Metric::AucDay { day: 2 });
        let t = parse_target("above=2mg/l..@60%").unwrap();
        assert_eq!(t.metric, Metric::Above { lo_mg_l: 2.0, hi_mg_l: f64::INFINITY });
        assert_eq!(t.lo, Some(60.0));
        assert!(t.met(75.0) && !t.met(50.0));
    }

    #[test]
    fn impossible_targets_are_refused() {
        assert!(parse_target("trough=20..10").unwrap_err().contains("lower bound is above"));
        assert!(parse_target("trough=..").is_err());
        assert!(parse_target("auc_day0=1..").is_err());
        assert!(parse_target("level=1..2").unwrap_err().contains("unknown target"));
        assert!(parse_target("above=2..@0%").is_err());
    }
}
