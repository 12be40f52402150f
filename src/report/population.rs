//! What the population report says: the study, the model and how it was estimated, the
//! parameter table, the objective, the warnings, the diagnostic plots, methods and references,
//! and the reproducibility block, as a [`Document`].

use super::content::Stamp;
use super::layout::{Block, Document, Table};
use super::plot::Figure;
use crate::dosing::Route;
use crate::fit::SubjectData;
use crate::io::output::readable;
use crate::population::Method;
use crate::population::summary::{Estimation, describe};

/// Everything the population report shows.
#[derive(Debug, Clone)]
pub struct PopulationAnalysis<'a> {
    /// Report title.
    pub title: String,
    /// Author line, if any.
    pub author: Option<String>,
    /// A note from the case file.
    pub note: Option<String>,
    /// The study's subjects.
    pub subjects: &'a [SubjectData],
    /// The estimation (its warnings include the diagnostics').
    pub estimation: &'a Estimation,
    /// The figures, in the order shown: the diagnostic plots, then the visual predictive check
    /// when there is one.
    pub figures: &'a [Figure],
    /// Where the report came from, and its caution.
    pub stamp: Stamp,
}

/// A share as a percentage with one decimal.
fn percent(part: usize, whole: usize) -> String {
    format!("{:.1} %", 100.0 * part as f64 / whole.max(1) as f64)
}

/// The study at a glance: subjects, levels and the share below the limit, doses by route.
fn data_section(a: &PopulationAnalysis, b: &mut Vec<Block>) {
    let levels: usize = a.subjects.iter().map(|s| s.levels.len()).sum();
    let blq: usize = a.subjects.iter().flat_map(|s| &s.levels).filter(|l| l.is_blq()).count();
    let doses: Vec<Route> = a.subjects.iter().flat_map(|s| s.doses.iter().map(|d| d.route)).collect();
    let routes: Vec<String> = [Route::Bolus, Route::Infusion, Route::Oral]
        .into_iter()
        .map(|r| (r, doses.iter().filter(|d| **d == r).count()))
        .filter(|(_, n)| *n > 0)
        .map(|(r, n)| format!("{r}: {n}"))
        .collect();
    b.push(Block::Heading("Data".into()));
    b.push(Block::KeyValues(vec![
        ("Subjects".into(), a.subjects.len().to_string()),
        ("Levels".into(), levels.to_string()),
        ("Below the quantification limit".into(), format!("{blq} ({})", percent(blq, levels))),
        ("Doses".into(), doses.len().to_string()),
        ("Dose routes".into(), routes.join(", ")),
    ]));
}

/// The model, how it was estimated, and whether it converged.
fn model_section(e: &Estimation, b: &mut Vec<Block>) {
    b.push(Block::Heading("Model and estimation".into()));
    let m = &e.model;
    let mut structure = String::from(
        "One well-mixed compartment with first-order elimination (k = CL/V); log-normal between-subject \
         variability of clearance and volume",
    );
    if m.absorption.is_some() {
        structure += ", first-order absorption (ka) after oral doses";
    }
    let effects: Vec<String> = [(&m.clearance, "clearance"), (&m.volume, "volume")]
        .iter()
        .flat_map(|(p, name)| {
            p.covariates.iter().map(move |c| format!("{} on {name} ({:?})", c.covariate, c.form))
        })
        .collect();
    if !effects.is_empty() {
        structure += &format!("; covariate effects: {}", effects.join(", "));
    }
    b.push(Block::Paragraph(format!(
        "{structure}; residual error σ² = a² + (b·f)². Levels below the quantification limit enter by the M3 \
         likelihood."
    )));
    let how = match (e.method, &e.nodes) {
        (Method::Laplace, _) => "Laplace approximation of each subject's likelihood".to_string(),
        (Method::Quadrature, Some(n)) if n.min == n.max => {
            format!("adaptive Gauss–Hermite quadrature, {} nodes per random effect", n.min)
        }
        (Method::Quadrature, Some(n)) => {
            format!("adaptive Gauss–Hermite quadrature, {} to {} nodes per principal axis", n.min, n.max)
        }
        (Method::Quadrature, None) => "adaptive Gauss–Hermite quadrature".to_string(),
    };
    let c = &e.convergence;
    let ended = if e.evaluated_only {
        "evaluated at the model's values, not estimated".to_string()
    } else if e.converged {
        format!("converged ({}; {} adaptations, {} iterations)", c.reason, c.adaptations, c.iterations)
    } else {
        format!("NOT CONVERGED ({}); treat the estimates as provisional", c.reason)
    };
    b.push(Block::KeyValues(vec![
        ("Likelihood".into(), format!("maximum likelihood, {how}")),
        ("Outcome".into(), ended),
    ]));
}

/// The parameter table: estimate, RSE %, 95 % interval and, for a variability, its random
/// effect's η-shrinkage.
fn parameter_section(e: &Estimation, b: &mut Vec<Block>) {
    b.push(Block::Heading("Parameter estimates".into()));
    let rows = e
        .rows()
        .into_iter()
        .map(|(object, key, est)| {
            let shrinkage = (object == "bsv")
                .then(|| key.strip_suffix("_cv"))
                .flatten()
                .and_then(|effect| e.eta_shrinkage_pct.get(effect))
                .map_or(String::new(), |s| format!("{s:.1}"));
            vec![
                describe(object, key) + if est.held { " (held)" } else { "" },
                readable(est.estimate.value, 4),
                est.rse_pct.map_or("—".into(), |r| format!("{r:.1}")),
                est.estimate
                    .ci95
                    .map_or("—".into(), |c| format!("{} – {}", readable(c[0], 4), readable(c[1], 4))),
                shrinkage,
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        headers: vec![
            "parameter".into(),
            "estimate".into(),
            "RSE (%)".into(),
            "95 % interval".into(),
            "η-shrinkage (%)".into(),
        ],
        rows,
        right: vec![false, true, true, true, true],
    }));
    b.push(Block::Note(
        "Estimates to 4 significant digits; RSE = 100·SE/|estimate| from the observed information; 95 % \
         intervals by the delta method on the estimation scale, transformed back; η-shrinkage = 100·(1 − SD(η̂)/ω) \
         over the subjects' conditional modes."
            .into(),
    ));
    let o = &e.objective;
    b.push(Block::Heading("Objective".into()));
    b.push(Block::KeyValues(vec![
        ("−2 log-likelihood".into(), readable(o.minus2ll, 8)),
        ("AIC".into(), readable(o.aic, 8)),
        ("BIC".into(), readable(o.bic, 8)),
        ("Estimated values".into(), o.n_parameters.to_string()),
        ("Levels".into(), o.n_observations.to_string()),
    ]));
}

/// Methods, assumptions and the sources.
fn methods_section(b: &mut Vec<Block>) {
    b.push(Block::Heading("Methods and references".into()));
    b.push(Block::Paragraph(
        "Each subject's likelihood is integrated over its random effects by adaptive Gauss–Hermite quadrature \
         (Pinheiro and Bates 1995) or approximated by the Laplace method (Wang 2007); levels below the limit \
         contribute the probability of lying below it (Beal 2001, M3). Standard errors come from the observed \
         information. Diagnostics against the estimated model: PRED is the typical subject's prediction for \
         the subject's covariates, IPRED the prediction at the subject's conditional mode, CWRES the residuals \
         of the model linearised at that mode (Hooker, Staatz and Karlsson 2007), NPDE the normalised \
         prediction distribution errors from simulations of each subject's design (Brendel et al. 2006; Comets, \
         Brendel and Mentré 2008). Bin medians: the points sorted by x, cut into at most 10 bins of at least 5 \
         consecutive points. QQ plot: the sorted NPDE against the normal quantiles at (i − ½)/n. Random \
         effects η = ln(individual estimate / typical value for the covariates), from each subject's MAP fit \
         against the estimated model. Visual predictive check: 500 replicate studies simulated from the \
         estimated model with the study's own doses, times, covariates and limits, binned by time after dose \
         at the data's sampling clusters; the observed 5th, 50th and 95th percentiles (nearest rank, levels \
         below the limit ranked lowest) against the 90 % intervals of the same percentiles over the \
         replicates, and the fraction below the limit beside its interval. docs/methods.md, sections 11 and \
         12, gives every formula."
            .into(),
    ));
    for r in [
        "Pinheiro JC, Bates DM. Approximations to the log-likelihood function in the nonlinear mixed-effects model. J Comput Graph Stat 1995;4:12–35. doi:10.1080/10618600.1995.10474663 (issue number not confirmed).",
        "Wang Y. J Pharmacokinet Pharmacodyn 2007;34(5):575–593. doi:10.1007/s10928-007-9060-6.",
        "Beal SL. Ways to fit a PK model with some data below the quantification limit. J Pharmacokinet Pharmacodyn 2001;28(5):481–504. doi:10.1023/a:1012299115260.",
        "Hooker AC, Staatz CE, Karlsson MO. Conditional weighted residuals (CWRES): a model diagnostic for the FOCE method. Pharm Res 2007;24(12):2187–2197. doi:10.1007/s11095-007-9361-x.",
        "Brendel K, Comets E, Laffont C, Laveille C, Mentré F. Metrics for external model evaluation with an application to the population pharmacokinetics of gliclazide. Pharm Res 2006;23(9):2036–2049. doi:10.1007/s11095-006-9067-5.",
        "Comets E, Brendel K, Mentré F. Computing normalised prediction distribution errors to evaluate nonlinear mixed-effect models. Comput Methods Programs Biomed 2008;90(2):154–166. doi:10.1016/j.cmpb.2007.12.002.",
        "Savic RM, Karlsson MO. Importance of shrinkage in empirical Bayes estimates for diagnostics: problems and solutions. AAPS J 2009;11(3):558–569. doi:10.1208/s12248-009-9133-0 (pages not confirmed).",
    ] {
        b.push(Block::Note(r.into()));
    }
}

/// Lay the population report out.
pub fn build(a: &PopulationAnalysis) -> Document {
    let e = a.estimation;
    let mut b = Vec::new();
    let drug = e.model.drug.clone().unwrap_or_else(|| "unnamed drug".into());
    b.extend(a.stamp.head(vec![("Drug (model)".to_string(), drug)], &a.author, &a.note));
    data_section(a, &mut b);
    model_section(e, &mut b);
    parameter_section(e, &mut b);
    b.push(Block::Heading("Warnings".into()));
    if e.warnings.is_empty() {
        b.push(Block::Note("No warnings from the estimation or the diagnostics.".into()));
    }
    for w in &e.warnings {
        b.push(Block::Note(format!("Warning: {}.", w.message)));
    }
    for n in &e.notes {
        b.push(Block::Note(format!("Note: {n}.")));
    }
    b.push(Block::PageBreak);
    b.push(Block::Heading("Diagnostic plots".into()));
    b.extend(a.figures.iter().cloned().map(Block::Figure));
    b.push(Block::PageBreak);
    methods_section(&mut b);
    a.stamp.reproducibility(&mut b);
    a.stamp.document(&a.title, &a.author, b)
}
