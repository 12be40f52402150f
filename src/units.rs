//! Quantities and units.
//!
//! One naming rule holds in CSV headers, TOML keys and JSON keys: `<quantity>_<unit>`
//! (`time_h`, `amount_mg`, `conc_mg_l`, `cl_l_h`, `v_l`). Values are converted on input to the
//! base units mg, h, L, L/h, mg/L and 1/h; a unit is never guessed. On the command line a value
//! carries its unit as a suffix (`1g`, `12h`, `90min`, `65ml/min`); a bare number is in base units.
//! Every value is checked against the absolute limits of its kind ([`crate::limits`]).

use std::fmt;

/// The physical dimension of a value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// Base unit h.
    Time,
    /// Base unit mg.
    Amount,
    /// Base unit mg/L.
    Concentration,
    /// Base unit L/h.
    Clearance,
    /// Base unit L.
    Volume,
    /// First-order rate constant, base unit 1/h.
    RateConstant,
    /// Zero-order input rate, base unit mg/h.
    InputRate,
    /// Area under the concentration curve, base unit mg·h/L.
    Auc,
}

impl Kind {
    /// Accepted unit spellings (normalised: lower case, `/` written `_`) with their factor to the base unit.
    pub fn units(self) -> &'static [(&'static str, f64)] {
        match self {
            // The common spellings of hours, minutes and days are all accepted.
            Kind::Time => &[
                ("h", 1.0),
                ("hr", 1.0),
                ("hrs", 1.0),
                ("hour", 1.0),
                ("hours", 1.0),
                ("min", 1.0 / 60.0),
                ("mins", 1.0 / 60.0),
                ("minute", 1.0 / 60.0),
                ("minutes", 1.0 / 60.0),
                ("d", 24.0),
                ("day", 24.0),
                ("days", 24.0),
            ],
            Kind::Amount => &[("mg", 1.0), ("g", 1000.0), ("mcg", 1e-3), ("ug", 1e-3)],
            Kind::Concentration => {
                &[("mg_l", 1.0), ("ug_ml", 1.0), ("mcg_ml", 1.0), ("ug_l", 1e-3), ("ng_ml", 1e-3)]
            }
            // 1 mL/min = 1e-3 L per (1/60) h = 0.06 L/h.
            Kind::Clearance => &[("l_h", 1.0), ("ml_min", 0.06)],
            Kind::Volume => &[("l", 1.0), ("ml", 1e-3)],
            Kind::RateConstant => &[("per_h", 1.0), ("1_h", 1.0), ("per_min", 60.0), ("per_d", 1.0 / 24.0)],
            Kind::InputRate => &[("mg_h", 1.0), ("mg_min", 60.0), ("g_h", 1000.0)],
            Kind::Auc => &[
                ("mg_h_l", 1.0),
                ("g_h_l", 1000.0),
                ("ug_h_ml", 1.0),
                ("mcg_h_ml", 1.0),
                ("mg_min_l", 1.0 / 60.0),
                ("ng_h_ml", 1e-3),
            ],
        }
    }

    /// A unit of another size than one whose factor is `factor`, as people write it (`min`
    /// beside `h`, `h` beside `min`): the example of how to write a value in another unit.
    pub fn another_unit(self, factor: f64) -> Option<String> {
        let size = |f: f64| (f / factor - 1.0).abs() > 1e-12;
        self.units().iter().find(|(_, f)| size(*f)).map(|(u, _)| u.replace('_', "/"))
    }

    /// The base unit's spelling, as used in output column names.
    pub fn base_unit(self) -> &'static str {
        self.units()[0].0
    }

    /// A human list of the accepted units, for error messages.
    pub fn accepted(self) -> String {
        self.units().iter().map(|(u, _)| *u).collect::<Vec<_>>().join(", ")
    }

    /// Factor that converts a value in `unit` (normalised spelling) to the base unit.
    pub fn factor(self, unit: &str) -> Option<f64> {
        let unit = normalise(unit);
        self.units().iter().find(|(u, _)| *u == unit).map(|(_, f)| *f)
    }
}

impl fmt::Display for Kind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let name = match self {
            Kind::Time => "time",
            Kind::Amount => "amount",
            Kind::Concentration => "concentration",
            Kind::Clearance => "clearance",
            Kind::Volume => "volume",
            Kind::RateConstant => "rate constant",
            Kind::InputRate => "input rate",
            Kind::Auc => "AUC",
        };
        f.write_str(name)
    }
}

/// Lower-case a unit and write `/`, `*`, `.` and `·` as `_`, so `mL/min`, `ml_min` and `ML/MIN`
/// are one unit, and so are `mg*h/L`, `mg.h/l` and `mg·h/L`.
fn normalise(unit: &str) -> String {
    let u = unit.trim().to_ascii_lowercase().replace(['/', '*', '.', '·'], "_");
    match u.as_str() {
        // `1/h` style rate constants.
        "_h" => "per_h".into(),
        "_min" => "per_min".into(),
        "_d" => "per_d".into(),
        _ => u,
    }
}

/// Parse a command-line value with an optional unit suffix (`1g`, `12h`, `65ml/min`, `0.1/h`)
/// into base units. A bare number is taken in base units.
pub fn parse_value(kind: Kind, text: &str) -> Result<f64, String> {
    let t = text.trim();
    let split = t
        .char_indices()
        .find(|&(i, c)| {
            !(c.is_ascii_digit()
                || c == '.'
                || ((c == '-' || c == '+') && (i == 0 || matches!(t.as_bytes()[i - 1], b'e' | b'E')))
                || ((c == 'e' || c == 'E')
                    && i > 0
                    && t[i + 1..].starts_with(|n: char| n.is_ascii_digit() || n == '-' || n == '+')))
        })
        .map(|(i, _)| i)
        .unwrap_or(t.len());
    let (number, unit) = t.split_at(split);
    let value: f64 = number.parse().map_err(|_| {
        format!("expected a number with an optional {kind} unit ({}), found '{text}'", kind.accepted())
    })?;
    if !value.is_finite() {
        return Err(format!("expected a finite number, found '{text}'"));
    }
    if unit.trim().is_empty() {
        return crate::limits::check(kind, value).map_err(|m| format!("{m} (given as '{text}')"));
    }
    match kind.factor(unit) {
        Some(f) if (value * f).is_finite() => {
            crate::limits::check(kind, value * f).map_err(|m| format!("{m} (given as '{text}')"))
        }
        Some(_) => Err(format!("'{text}' is out of range once converted to {}", kind.base_unit())),
        None => Err(format!(
            "unknown {kind} unit '{}' in '{text}'; accepted units: {}",
            unit.trim(),
            kind.accepted()
        )),
    }
}

/// True when a command-line value is a bare number (read in the base unit of its kind).
pub fn is_bare(text: &str) -> bool {
    text.trim().parse::<f64>().is_ok()
}

/// What a `<quantity>_<unit>` column or key name means.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Named<'a> {
    /// The quantity part (`time` in `time_h`).
    pub quantity: &'a str,
    /// Its dimension.
    pub kind: Kind,
    /// Factor from the column's unit to the base unit.
    pub factor: f64,
}

/// Split a `<quantity>_<unit>` name, knowing which quantities exist and their kinds.
///
/// Returns `Ok(None)` when the quantity is not one of `known` (the column is not ours),
/// and an error when the quantity is known but the unit is not (`amount_kg`) or missing (`amount`).
///
/// Names are matched in any case (`Time_H`, `AMOUNT_MG`), as units are.
pub fn parse_name<'a>(name: &'a str, known: &[(&str, Kind)]) -> Result<Option<Named<'a>>, String> {
    let name = name.trim();
    let lower = name.to_ascii_lowercase();
    for &(quantity, kind) in known {
        if lower == quantity {
            return Err(format!(
                "column '{name}' has no unit: write it as {quantity}_<unit> with one of: {}",
                kind.accepted()
            ));
        }
        // Lower-casing ASCII keeps byte offsets, so the unit is cut from the name as written.
        if lower.strip_prefix(quantity).is_some_and(|r| r.starts_with('_')) {
            let unit = &name[quantity.len() + 1..];
            return match kind.factor(unit) {
                Some(factor) => Ok(Some(Named { quantity: &name[..quantity.len()], kind, factor })),
                None => Err(format!(
                    "unknown {kind} unit '{unit}' in column '{name}'; accepted units: {}",
                    kind.accepted()
                )),
            };
        }
    }
    Ok(None)
}

/// The smallest practical step of the form 1, 2, 2.5 or 5 × 10ⁿ that is at least `x` (> 0): the
/// rounding of default amounts (mg) and default time grids (h).
pub fn round_step(x: f64) -> f64 {
    let scale = 10f64.powf(x.log10().floor());
    [1.0, 2.0, 2.5, 5.0, 10.0]
        .into_iter()
        .map(|m| m * scale)
        .find(|s| *s >= x * (1.0 - 1e-12))
        .unwrap_or(10.0 * scale)
}

#[cfg(test)]
#[allow(clippy::float_cmp)] // these values are exact in binary floating point
mod tests {
    use super::*;

    #[test]
    fn flag_values_convert_to_base_units() {
        assert_eq!(parse_value(Kind::Amount, "1g").unwrap(), 1000.0);
        assert_eq!(parse_value(Kind::Amount, "250").unwrap(), 250.0);
        assert_eq!(parse_value(Kind::Time, "90min").unwrap(), 1.5);
        assert_eq!(parse_value(Kind::Time, "2d").unwrap(), 48.0);
        for (text, hours) in [("12hr", 12.0), ("12 hrs", 12.0), ("1hour", 1.0), ("12 Hours", 12.0)] {
            assert_eq!(parse_value(Kind::Time, text).unwrap(), hours, "{text}");
        }
        for (text, hours) in [("90mins", 1.5), ("1 minute", 1.0 / 60.0), ("90 minutes", 1.5)] {
            assert_eq!(parse_value(Kind::Time, text).unwrap(), hours, "{text}");
        }
        assert_eq!(parse_value(Kind::Time, "1day").unwrap(), 24.0);
        assert_eq!(parse_value(Kind::Time, "2 days").unwrap(), 48.0);
        assert!((parse_value(Kind::Clearance, "65ml/min").unwrap() - 3.9).abs() < 1e-12);
        assert_eq!(parse_value(Kind::RateConstant, "0.5/h").unwrap(), 0.5);
        assert_eq!(parse_value(Kind::Amount, "1.5e3mg").unwrap(), 1500.0);
        assert_eq!(parse_value(Kind::Concentration, "500ng/mL").unwrap(), 0.5);
    }

    #[test]
    fn unknown_units_are_named_with_the_accepted_list() {
        let e = parse_value(Kind::Amount, "3kg").unwrap_err();
        assert!(e.contains("'kg'") && e.contains("mg, g, mcg, ug"), "{e}");
        assert!(parse_value(Kind::Time, "h").is_err());
        assert!(parse_value(Kind::Time, "inf").is_err());
    }

    #[test]
    fn names_split_into_quantity_and_unit() {
        let known = [("time", Kind::Time), ("amount", Kind::Amount)];
        let n = parse_name("amount_g", &known).unwrap().unwrap();
        assert_eq!((n.quantity, n.factor), ("amount", 1000.0));
        assert!(parse_name("amount_kg", &known).is_err());
        assert!(parse_name("amount", &known).is_err());
        assert_eq!(parse_name("site", &known).unwrap(), None);
        let n = parse_name("Amount_G", &known).unwrap().unwrap();
        assert_eq!((n.quantity, n.factor), ("Amount", 1000.0));
    }
}
