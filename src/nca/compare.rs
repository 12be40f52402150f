//! NCA beside a model fit: the area and clearance of each dosing interval against those of the
//! subject's fitted one-compartment curve, with the subjects where they disagree flagged. A
//! model whose AUC disagrees with the data's is suspect.
//!
//! The model's area covers the same span as the NCA's AUClast (from the dose to tlast, the
//! whole dose history superposed, exact: `engine::auc`); the model's clearance is the fit's CL,
//! or CL/F after an oral dose, to set beside the NCA's CL or CL/F.

use crate::dosing::{Dose, Route};
use crate::engine::{Params, auc};
use crate::nca::IntervalNca;
use serde::Serialize;

/// The relative difference above which NCA and model are said to disagree (a convention of
/// this project: 20 %).
pub const DISAGREEMENT_PCT: f64 = 20.0;

/// One dosing interval's NCA and model values side by side.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Comparison {
    /// The subject.
    pub subject: Option<String>,
    /// The dose's number.
    pub interval: usize,
    /// NCA AUC from the dose to tlast (mg·h/L).
    pub nca_auc_last_mg_h_l: Option<f64>,
    /// The fitted curve's AUC over the same span.
    pub fit_auc_last_mg_h_l: Option<f64>,
    /// (NCA − fit)/fit, %.
    pub auc_difference_pct: Option<f64>,
    /// NCA clearance (CL, or CL/F after an oral dose), L/h.
    pub nca_cl_l_h: Option<f64>,
    /// The fit's clearance on the same footing (CL, or CL/F).
    pub fit_cl_l_h: f64,
    /// (NCA − fit)/fit, %.
    pub cl_difference_pct: Option<f64>,
    /// Whether either difference is above [`DISAGREEMENT_PCT`].
    pub disagree: bool,
}

/// Compare one subject's NCA results with its fitted parameters, given its dose history.
pub fn compare(results: &[IntervalNca], params: &Params, doses: &[Dose]) -> Vec<Comparison> {
    results
        .iter()
        .map(|r| {
            let fit_auc = r.tlast_h.map(|t| auc(params, doses, r.dose_time_h, r.dose_time_h + t));
            let fit_cl = if r.route == Route::Oral { params.cl_l_h / params.f } else { params.cl_l_h };
            let difference = |nca: Option<f64>, fit: Option<f64>| {
                nca.zip(fit).filter(|(_, f)| *f > 0.0).map(|(n, f)| 100.0 * (n - f) / f)
            };
            let auc_difference_pct = difference(r.auc_last_mg_h_l, fit_auc);
            let nca_cl = r.disposition.values().0;
            let cl_difference_pct = difference(nca_cl, Some(fit_cl));
            let disagree =
                [auc_difference_pct, cl_difference_pct].iter().flatten().any(|d| d.abs() > DISAGREEMENT_PCT);
            Comparison {
                subject: r.subject.clone(),
                interval: r.interval,
                nca_auc_last_mg_h_l: r.auc_last_mg_h_l,
                fit_auc_last_mg_h_l: fit_auc,
                auc_difference_pct,
                nca_cl_l_h: nca_cl,
                fit_cl_l_h: fit_cl,
                cl_difference_pct,
                disagree,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::nca::{NcaOptions, analyse};

    #[test]
    fn levels_from_the_fitted_curve_agree_with_it() {
        // Levels of a bolus from the exact curve C = D/V·e^(−kt): the log-down NCA is exact, so
        // the differences are rounding only.
        let params = Params::iv(5.0, 50.0);
        let dose = Dose { time_h: 0.0, amount_mg: 100.0, route: Route::Bolus, duration_h: 0.0 };
        let levels = [1.0, 2.0, 4.0, 8.0, 12.0].map(|t| crate::io::levels::Level {
            time_h: t,
            conc_mg_l: Some(2.0 * (-0.1 * t).exp()),
            lloq_mg_l: None,
            line: 0,
        });
        let subject = crate::fit::SubjectData {
            id: None,
            doses: vec![dose],
            levels: levels.to_vec(),
            covariates: Default::default(),
        };
        let options = NcaOptions {
            auc_rule: crate::nca::auc::AucRule::LinearUpLogDown,
            blq: crate::nca::intervals::BlqRule::ZeroThenDrop,
            lambda_z: crate::nca::LambdaZChoice::Automatic,
            partials: Vec::new(),
            lambda_z_times: Default::default(),
        };
        let c = compare(&analyse(&[subject], &options), &params, &[dose]);
        assert!(
            c[0].auc_difference_pct.unwrap().abs() < 1e-9 && c[0].cl_difference_pct.unwrap().abs() < 1e-9
        );
        assert!(!c[0].disagree);
    }
}
