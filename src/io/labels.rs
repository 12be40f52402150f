//! Human labels with units for the keys of the outputs: what a table header or a message
//! says where a CSV column or JSON key says `auc24_mg_h_l`. The keys stay the contract of CSV
//! and JSON; tables and messages read these labels, all from this one list.

/// Each output key with its label for reading (the unit in parentheses).
const LABELS: &[(&str, &str)] = &[
    // Parameters.
    ("cl_l_h", "clearance (L/h)"),
    ("v_l", "volume (L)"),
    ("k_per_h", "elimination rate constant (1/h)"),
    ("half_life_h", "half-life (h)"),
    ("ka_per_h", "absorption rate constant (1/h)"),
    ("time_constant_h", "time constant V/CL (h)"),
    ("steady_state_gain_h_l", "steady-state gain 1/CL (mg/L per mg/h)"),
    ("f", "bioavailability"),
    ("tlag_h", "lag time (h)"),
    // Regimens.
    ("amount_mg", "dose (mg)"),
    ("every_h", "interval (h)"),
    ("duration_h", "infusion duration (h)"),
    ("route", "route"),
    ("daily_mg", "daily dose (mg)"),
    ("loading_dose_mg", "loading dose (mg)"),
    // Curves and levels.
    ("time_h", "time (h)"),
    ("conc_mg_l", "concentration (mg/L)"),
    ("observed_mg_l", "observed (mg/L)"),
    ("predicted_mg_l", "predicted (mg/L)"),
    ("residual_mg_l", "residual (mg/L)"),
    ("weighted_residual", "weighted residual"),
    ("after_dose_h", "after the dose (h)"),
    // Exposure.
    ("peak_mg_l", "steady-state peak (mg/L)"),
    ("peak_time_h", "peak time after the dose (h)"),
    ("trough_mg_l", "steady-state trough (mg/L)"),
    ("auc_tau_mg_h_l", "AUC over one interval (mg·h/L)"),
    ("auc24_mg_h_l", "AUC24 (mg·h/L)"),
    ("cavg_mg_l", "average concentration (mg/L)"),
    ("accumulation_ratio", "accumulation ratio"),
    ("fluctuation_pct", "peak-trough fluctuation (% of average)"),
    ("time_to_90pct_h", "time to 90 % of steady state (h)"),
    ("time_to_95pct_h", "time to 95 % of steady state (h)"),
    ("cmax_mg_l", "highest concentration (mg/L)"),
    ("tmax_h", "its time after the dose (h)"),
    ("auc_inf_mg_h_l", "AUC from the dose to infinity (mg·h/L)"),
    // Probabilities, printed as percentages.
    ("pta", "PTA (%)"),
    ("p_over_peak", "peak over its limit (%)"),
    ("p_over_trough", "trough over its limit (%)"),
    // Covariates.
    ("age_y", "age (y)"),
    ("weight_kg", "weight (kg)"),
    ("height_cm", "height (cm)"),
    ("scr_mg_dl", "serum creatinine (mg/dL)"),
    ("crcl_ml_min", "creatinine clearance (mL/min)"),
    ("bsa_m2", "body surface area (m²)"),
    ("ibw_kg", "ideal body weight (kg)"),
    // Fits.
    ("objective", "objective"),
    ("effective_draws", "effective draws"),
];

/// The label of an output key (`auc24_mg_h_l` → `AUC24 (mg·h/L)`); a key without one is
/// returned as it is.
pub fn label(key: &str) -> &str {
    LABELS.iter().find(|(k, _)| *k == key).map_or(key, |(_, l)| l)
}

/// An output key's label and unit apart (`auc24_mg_h_l` → `("AUC24", "mg·h/L")`; the unit
/// is empty for a pure number), for a sentence that puts the unit after a value.
pub fn name_and_unit(key: &str) -> (&str, &str) {
    let l = label(key);
    match l.rsplit_once(" (") {
        Some((name, unit)) => (name, unit.trim_end_matches(')')),
        None => (l, ""),
    }
}

/// A probability (0–1) as a percentage for reading, with one decimal: `0.169` → `16.9 %`.
/// Tables and messages print every probability this way, so one sentence never mixes scales.
pub fn percent(p: f64) -> String {
    format!("{:.1} %", 100.0 * p)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_read_as_labels_with_units() {
        assert_eq!(label("auc24_mg_h_l"), "AUC24 (mg·h/L)");
        assert_eq!(label("pta"), "PTA (%)");
        assert_eq!(label("no_such_key"), "no_such_key");
        assert_eq!(name_and_unit("auc24_mg_h_l"), ("AUC24", "mg·h/L"));
        assert_eq!(name_and_unit("accumulation_ratio"), ("accumulation ratio", ""));
    }

    #[test]
    fn every_key_has_one_label() {
        for (i, (k, _)) in LABELS.iter().enumerate() {
            assert!(LABELS[i + 1..].iter().all(|(other, _)| other != k), "{k} twice");
        }
    }

    #[test]
    fn probabilities_read_as_percentages() {
        assert_eq!(percent(0.169), "16.9 %");
        assert_eq!(percent(0.1), "10.0 %");
    }
}
