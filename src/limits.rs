//! The range of every quantity, and the bounds on the work one command may ask for.
//!
//! Each quantity kind has **absolute limits**: a non-zero magnitude outside them cannot be
//! meant (a volume of 1e-300 L, a level of 1e160 mg/L) and would drive the arithmetic to
//! underflow, overflow or NaN, so it is refused wherever a value enters — flags, CSV columns,
//! TOML keys, covariates — with exit code 2. Inside them every computation stays finite:
//! the largest rate is the largest amount over the shortest time (1e7 mg / 1e-6 h = 1e13 mg/h),
//! the longest span times the fastest rate constant only underflows to 0.
//!
//! Each kind also has **plausible limits** for a human patient; a value outside them is read
//! as written but earns one warning in readable numbers (the command line prints it, naming
//! the unit a bare number was read in).
//!
//! The limits are documented in docs/formats.md ("Limits"); change both together.

use crate::units::Kind;

/// The limits of one quantity kind, in its base unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Range {
    /// The smallest non-zero magnitude accepted (0 itself is accepted where the quantity
    /// allows it; the quantity's own check decides).
    pub smallest: f64,
    /// The largest magnitude accepted.
    pub largest: f64,
    /// Positive values outside `[lo, hi]` earn a warning.
    pub plausible: (f64, f64),
}

/// The table of limits, one row per kind.
pub fn range(kind: Kind) -> Range {
    let (smallest, largest, plausible) = match kind {
        // 3.6 ms to 114 years; plausible: a minute to a year.
        Kind::Time => (1e-6, 1e6, (1.0 / 60.0, 8766.0)),
        // 1 ng to 10 kg; plausible: 1 µg to 100 g.
        Kind::Amount => (1e-6, 1e7, (1e-3, 1e5)),
        // 1 pg/L to 1 kg/L; plausible: 1 ng/L to 10 g/L.
        Kind::Concentration => (1e-9, 1e6, (1e-6, 1e4)),
        // 1 µL/h to 100,000 L/h; plausible: 10 mL/h to 1,000 L/h.
        Kind::Clearance => (1e-6, 1e5, (0.01, 1e3)),
        // 1 µL to 1,000,000 L; plausible: 100 mL to 50,000 L.
        Kind::Volume => (1e-6, 1e6, (0.1, 5e4)),
        // One per 114 years to 10,000 per hour; plausible: 1e-4 to 100 per hour.
        Kind::RateConstant => (1e-6, 1e4, (1e-4, 100.0)),
        // 1 ng/h to 10 t/h (the largest amount over the shortest time); plausible: 1 µg/h to 1 kg/h.
        Kind::InputRate => (1e-6, 1e13, (1e-3, 1e6)),
        // Plausible: 1 µg·h/L to 1 kg·h/L.
        Kind::Auc => (1e-9, 1e9, (1e-3, 1e6)),
    };
    Range { smallest, largest, plausible }
}

/// The limits of a covariate (any name): a non-zero magnitude between 1e-6 and 1e6 in the
/// covariate's own unit. No covariate of the trade (weight in kg, age in years, creatinine in
/// mg/dL, clearance in mL/min, height in cm) comes near either end.
pub const COVARIATE: Range = Range { smallest: 1e-6, largest: 1e6, plausible: (1e-6, 1e6) };

/// The plausible range of a covariate of the trade for a human patient, in the unit its name
/// gives, and the name of the same quantity in another unit when the tool reads one (common
/// practice, no source: wide enough for neonates and for the heaviest adults). A value outside
/// it is read as written and earns a warning; `None` for a covariate not listed.
pub fn covariate_plausible(name: &str) -> Option<((f64, f64), Option<&'static str>)> {
    Some(match name {
        "weight_kg" | "ibw_kg" => ((0.3, 350.0), None),
        "age_y" => ((0.0, 120.0), None),
        "height_cm" => ((25.0, 250.0), None),
        "scr_mg_dl" => ((0.1, 20.0), Some("scr_umol_l")),
        "scr_umol_l" => ((5.0, 1800.0), Some("scr_mg_dl")),
        "crcl_ml_min" => ((1.0, 300.0), None),
        "bsa_m2" => ((0.1, 3.5), None),
        _ => return None,
    })
}

/// A warning when a covariate's positive value lies outside its plausible range
/// ([`covariate_plausible`]), else `None`.
pub fn implausible_covariate(name: &str, value: f64) -> Option<String> {
    let ((lo, hi), other) = covariate_plausible(name)?;
    let unit = name.split_once('_').map_or("", |(_, u)| u).replace('_', "/");
    let other = other.map_or_else(String::new, |o| format!("; if it is in another unit, name it {o}"));
    (value > 0.0 && !(lo..=hi).contains(&value)).then(|| {
        format!(
            "{name} = {} is unusual (expected {} to {} {unit}, the unit in the name{other})",
            number(value),
            number(lo),
            number(hi)
        )
    })
}

/// The base unit of `kind` as people write it (`mg/L`, `L/h`), for messages.
pub fn unit_text(kind: Kind) -> &'static str {
    match kind {
        Kind::Time => "h",
        Kind::Amount => "mg",
        Kind::Concentration => "mg/L",
        Kind::Clearance => "L/h",
        Kind::Volume => "L",
        Kind::RateConstant => "1/h",
        Kind::InputRate => "mg/h",
        Kind::Auc => "mg·h/L",
    }
}

/// Check a value against the absolute limits of `kind` (in base units), saying what is wrong.
pub fn check(kind: Kind, value: f64) -> Result<f64, String> {
    let range = range(kind);
    // The kind's name is written only for the message (every number of an input passes here).
    if value.is_finite() && within(&range, value.abs()) {
        return Ok(value);
    }
    check_range(&range, value, &kind.to_string(), unit_text(kind))
}

/// A finite magnitude inside `range`, or zero.
fn within(range: &Range, magnitude: f64) -> bool {
    magnitude <= range.largest && (magnitude == 0.0 || magnitude >= range.smallest)
}

/// Check a value against `range`; `what` names the quantity and `unit` its unit in the message.
pub fn check_range(range: &Range, value: f64, what: &str, unit: &str) -> Result<f64, String> {
    if !(value.is_finite() && within(range, value.abs())) {
        let unit = if unit.is_empty() { String::new() } else { format!(" {unit}") };
        return Err(format!(
            "{}{unit} is outside the accepted range for {what} ({} to {}{unit} in magnitude, or 0)",
            number(value),
            number(range.smallest),
            number(range.largest)
        ));
    }
    Ok(value)
}

/// A count for messages: whole below a trillion, else in powers of ten.
fn count(n: u64) -> String {
    if n < 1_000_000_000_000 { n.to_string() } else { number(n as f64) }
}

/// A warning when a positive value lies outside the plausible limits of `kind`, else `None`.
pub fn implausible(kind: Kind, value: f64) -> Option<String> {
    let (lo, hi) = range(kind).plausible;
    (value > 0.0 && !(lo..=hi).contains(&value)).then(|| {
        format!(
            "{} {} is an unusual {kind} (expected {} to {} {})",
            number(value),
            unit_text(kind),
            number(lo),
            number(hi),
            unit_text(kind)
        )
    })
}

/// The unit in which `number`, read in a unit of `factor` (1 for the base unit) and implausible
/// there, would have been plausible for `kind`: of the kind's other units, the one that puts
/// it nearest the middle of the plausible range on a log scale (`1000000` mg → `mcg`, as
/// 1,000,000 µg is 1 g); `None` when no unit does (`0.004` L/h is tiny in every unit).
pub fn plausible_unit(kind: Kind, number: f64, factor: f64) -> Option<String> {
    let (lo, hi) = range(kind).plausible;
    let middle = (lo.ln() + hi.ln()) / 2.0;
    let off_middle = |v: f64| (v.ln() - middle).abs();
    kind.units()
        .iter()
        .filter(|(_, f)| (f / factor - 1.0).abs() > 1e-12)
        .map(|(u, f)| (u, number * f))
        .filter(|(_, v)| (lo..=hi).contains(v))
        .min_by(|a, b| off_middle(a.1).total_cmp(&off_middle(b.1)))
        .map(|(u, _)| u.replace('_', "/"))
}

/// A number for messages: at most four significant digits, never a 300-digit expansion.
pub fn number(x: f64) -> String {
    if !x.is_finite() {
        return if x.is_nan() { "not a number".into() } else { "an infinite number".into() };
    }
    let magnitude = if x == 0.0 { 0 } else { x.abs().log10().floor() as i32 };
    if (-3..=6).contains(&magnitude) {
        let text = format!("{:.*}", (3 - magnitude).max(0) as usize, x);
        if text.contains('.') { text.trim_end_matches('0').trim_end_matches('.').to_string() } else { text }
    } else {
        format!("{x:.3e}").replace(".000e", "e")
    }
}

/// The most doses one analysis may expand its dose rows and regimens to (all subjects
/// together): a million doses take 32 MB; a larger `count` is a typing error.
pub const MAX_DOSES: u64 = 1_000_000;

/// The most values one output may hold without `--allow-large` (time points × subjects of a
/// simulation): about 30 MB of CSV.
pub const MAX_OUTPUT_VALUES: u64 = 1_000_000;

/// The most values one output may hold even with `--allow-large`: the computation then holds
/// about 800 MB in memory and writes about 1.5 GB.
pub const HARD_MAX_OUTPUT_VALUES: u64 = 50_000_000;

/// The most objective evaluations one minimisation may spend (BFGS with its line searches,
/// Nelder–Mead, and the Newton polish together): a fit that has not converged by then ends
/// and is reported as not converged.
pub const MAX_EVALUATIONS: u64 = 20_000;

/// Concentrations below this (mg/L) are printed as 0: they are below any assay by a factor
/// of a million, and the digits of a subnormal number (3.5e-323) mean nothing.
pub const CONC_FLOOR_MG_L: f64 = 1e-12;

/// The smallest AUC a message prints in digits (mg·h/L), a thousandth of the smallest
/// plausible one: a message says `< 1e-6` below it, never the digits of a vanishing number
/// (`9.3e-43`, the AUC of a window long after the dose). CSV and JSON keep the value.
pub const AUC_FLOOR_MG_H_L: f64 = 1e-6;

/// An AUC for a message: `text` of it, or `< 1e-6` below [`AUC_FLOOR_MG_H_L`] (0 stays 0).
pub fn auc_message(auc: f64, text: impl Fn(f64) -> String) -> String {
    if auc != 0.0 && auc.abs() < AUC_FLOOR_MG_H_L { "< 1e-6".into() } else { text(auc) }
}

/// A computed concentration as reported: flushed to 0 below [`CONC_FLOOR_MG_L`].
pub fn reported_conc(c: f64) -> f64 {
    if c.abs() < CONC_FLOOR_MG_L { 0.0 } else { c }
}

/// Check the size of an output of `values` numbers against [`MAX_OUTPUT_VALUES`] (lifted to
/// [`HARD_MAX_OUTPUT_VALUES`] by `allow_large`), saying what is wrong.
pub fn check_output_size(values: u64, allow_large: bool) -> Result<(), String> {
    if values > HARD_MAX_OUTPUT_VALUES {
        Err(format!(
            "the output would hold {} values, more than the {HARD_MAX_OUTPUT_VALUES} any run may \
             write; ask for fewer time points or subjects",
            count(values)
        ))
    } else if values > MAX_OUTPUT_VALUES && !allow_large {
        Err(format!(
            "the output would hold {values} values, more than {MAX_OUTPUT_VALUES}; use a larger \
             step or fewer times, or confirm with --allow-large (up to {HARD_MAX_OUTPUT_VALUES})"
        ))
    } else {
        Ok(())
    }
}

/// Check a number of expanded doses against [`MAX_DOSES`], saying what is wrong.
pub fn check_doses(doses: u64) -> Result<(), String> {
    if doses > MAX_DOSES {
        Err(format!("{} doses in all is more than the {MAX_DOSES} one analysis may expand to", count(doses)))
    } else {
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn messages_print_readable_numbers() {
        assert_eq!(number(1e300), "1e300");
        let tiny = number(1.5e-320);
        assert!(tiny.ends_with("e-320") && tiny.len() <= 10, "{tiny}");
        assert_eq!(number(60.0), "60");
        assert_eq!(number(0.004), "0.004");
        assert_eq!(number(6931.47), "6931");
        assert!(number(f64::NAN).contains("not a number"));
    }

    #[test]
    fn absolute_limits_refuse_extremes_and_accept_zero() {
        assert!(check(Kind::Volume, 1e-300).is_err());
        assert!(check(Kind::Amount, 1e300).is_err());
        assert!(check(Kind::Concentration, 1e160).is_err());
        assert!(check(Kind::Amount, 0.0).is_ok());
        assert!(check(Kind::Time, -12.0).is_ok());
        assert!(check(Kind::Time, f64::INFINITY).is_err());
        let m = check(Kind::Volume, 1e-300).unwrap_err();
        assert!(m.len() < 120, "{m}");
    }

    #[test]
    fn the_rate_of_the_largest_dose_over_the_shortest_time_is_in_range() {
        let rate = range(Kind::Amount).largest / range(Kind::Time).smallest;
        assert!(check(Kind::InputRate, rate).is_ok());
    }
}
