//! The estimated values of a population model as one unconstrained vector φ, so that the
//! optimiser may move freely: ln of each typical value, each covariate effect as it is, ln ω of
//! each variability, atanh of each correlation, ln of each residual term. A value the model
//! file holds (`[estimation] hold`), a residual term or variability given as 0, F and the lag
//! time are not in φ.

use crate::covariates::Covariates;
use crate::fit::linalg::{MAX, Mat};
use crate::model::{Form, PopulationModel};

/// The names of the random effects, in order.
pub const EFFECTS: [&str; MAX] = ["cl", "v", "ka"];

/// One entry of φ.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Free {
    /// ln of the typical value of parameter 0 (CL), 1 (V) or 2 (ka).
    Typical(usize),
    /// The `e`-th covariate effect of parameter `p`, as it is.
    Effect {
        /// The parameter: 0 (CL) or 1 (V).
        p: usize,
        /// Which of its covariate effects.
        e: usize,
    },
    /// ln ω of parameter `p`'s variability.
    LogSd(usize),
    /// atanh of the correlation of random effects `i` < `j`.
    Correlation(usize, usize),
    /// ln of the additive residual SD.
    Additive,
    /// ln of the proportional residual CV.
    Proportional,
}

/// The estimated values of a model and how to put them back.
#[derive(Debug, Clone)]
pub struct Space {
    /// The model the values come from; everything not in `free` stays as it is.
    pub base: PopulationModel,
    /// What each entry of φ is.
    pub free: Vec<Free>,
    /// The number of random effects integrated over: 2 (CL, V) or 3 (with ka).
    pub n: usize,
}

/// The values a subject's likelihood needs at one φ.
#[derive(Debug, Clone)]
pub struct Values {
    /// The model at φ.
    pub model: PopulationModel,
    /// Ω (n × n corner).
    pub omega: Mat,
    /// (a, b) of σ² = a² + (b·f)².
    pub residual: [f64; 2],
}

impl Space {
    /// The space of `model` for a study whose doses include oral ones (`oral`), with the notes
    /// on what is held because the data cannot inform it.
    pub fn new(model: &PopulationModel, oral: bool) -> (Space, Vec<String>) {
        let mut notes = Vec::new();
        let ka_varies = model.absorption.as_ref().is_some_and(|a| a.ka.varies());
        let n = if oral && ka_varies { 3 } else { 2 };
        if model.absorption.is_some() && !oral {
            notes.push(
                "no dose is oral: the [absorption] table is not used and its values are kept as given".into(),
            );
        } else if oral
            && model.absorption.is_some()
            && !ka_varies
            && !model.holds("absorption.typical_ka_per_h")
        {
            notes.push(
                "ka has no variability (absorption.bsv_cv = 0), so its typical value is held as given; \
                 give absorption.bsv_cv above 0 to estimate it"
                    .into(),
            );
        }
        let free = Space::structure(model, n).into_iter().filter(|f| !model.holds(&key(model, *f))).collect();
        (Space { base: model.clone(), free, n }, notes)
    }

    /// Every value of `model`'s structure with `n` random effects, estimated or held, in
    /// reading order: typical values, covariate effects, variabilities, correlations given in
    /// the file, residual terms above 0.
    pub fn structure(model: &PopulationModel, n: usize) -> Vec<Free> {
        let mut all: Vec<Free> = (0..n).map(Free::Typical).collect();
        for (p, parameter) in [&model.clearance, &model.volume].into_iter().enumerate() {
            all.extend((0..parameter.covariates.len()).map(|e| Free::Effect { p, e }));
        }
        all.extend((0..n).map(Free::LogSd));
        for (i, j) in [(0, 1), (0, 2), (1, 2)] {
            if j < n && model.correlation.between(i, j).is_some() {
                all.push(Free::Correlation(i, j));
            }
        }
        if model.residual.additive_mg_l > 0.0 {
            all.push(Free::Additive);
        }
        if model.residual.proportional_cv > 0.0 {
            all.push(Free::Proportional);
        }
        all
    }

    /// φ of the base model.
    pub fn start(&self) -> Vec<f64> {
        let m = &self.base;
        self.free
            .iter()
            .map(|f| match *f {
                Free::Typical(p) => Self::parameter(m, p).typical.ln(),
                Free::Effect { p, e } => Self::parameter(m, p).covariates[e].effect,
                Free::LogSd(p) => 0.5 * Self::parameter(m, p).omega2.ln(),
                Free::Correlation(i, j) => m.correlation.between(i, j).unwrap_or(0.0).atanh(),
                Free::Additive => m.residual.additive_mg_l.ln(),
                Free::Proportional => m.residual.proportional_cv.ln(),
            })
            .collect()
    }

    fn parameter_mut(m: &mut PopulationModel, p: usize) -> &mut crate::model::Parameter {
        match p {
            0 => &mut m.clearance,
            1 => &mut m.volume,
            _ => &mut m.absorption.as_mut().expect("ka is estimated only with an [absorption] table").ka,
        }
    }

    /// Parameter `p` of a model: 0 CL, 1 V, 2 ka.
    pub fn parameter(m: &PopulationModel, p: usize) -> &crate::model::Parameter {
        match p {
            0 => &m.clearance,
            1 => &m.volume,
            // Typical(2) and LogSd(2) are only in φ when the model has absorption.
            _ => &m.absorption.as_ref().expect("ka is estimated only with an [absorption] table").ka,
        }
    }

    /// The model at φ.
    pub fn model(&self, phi: &[f64]) -> PopulationModel {
        let mut m = self.base.clone();
        for (f, &x) in self.free.iter().zip(phi) {
            match *f {
                Free::Typical(p) => Self::parameter_mut(&mut m, p).typical = x.exp(),
                Free::Effect { p, e } => Self::parameter_mut(&mut m, p).covariates[e].effect = x,
                Free::LogSd(p) => {
                    let q = Self::parameter_mut(&mut m, p);
                    q.omega2 = (2.0 * x).exp();
                    q.bsv_cv = q.omega2.exp_m1().sqrt();
                }
                Free::Correlation(i, j) => *m.correlation.slot(i, j) = Some(x.tanh()),
                Free::Additive => m.residual.additive_mg_l = x.exp(),
                Free::Proportional => m.residual.proportional_cv = x.exp(),
            }
        }
        m
    }

    /// The values a likelihood needs at φ.
    pub fn values(&self, phi: &[f64]) -> Values {
        let model = self.model(phi);
        let omega = model.omega();
        let residual = [model.residual.additive_mg_l, model.residual.proportional_cv];
        Values { model, omega, residual }
    }

    /// A subject's prior mean μ (ln of its typical values) at `values`, and ∂μ/∂φ for each
    /// entry of φ (zero rows for entries that do not move μ); `None` where a covariate effect
    /// gives a typical value of zero or less, or the model lacks a covariate.
    pub fn prior_mean(
        &self,
        values: &Values,
        covariates: &Covariates,
    ) -> Option<([f64; MAX], Vec<[f64; MAX]>)> {
        let m = &values.model;
        let mut mu = [0.0; MAX];
        for p in 0..self.n {
            mu[p] = Self::parameter(m, p).typical_for(covariates).ok()?.ln();
        }
        if self.n == 2
            && let Some(a) = &m.absorption
        {
            mu[2] = a.ka.typical.ln();
        }
        let d = self
            .free
            .iter()
            .map(|f| {
                let mut row = [0.0; MAX];
                match *f {
                    Free::Typical(p) => row[p] = 1.0,
                    Free::Effect { p, e } => {
                        let c = &Self::parameter(m, p).covariates[e];
                        let x = covariates.get(&c.covariate).unwrap_or(f64::NAN);
                        row[p] = match c.form {
                            Form::Power => (x / c.reference).ln(),
                            Form::Linear => (x - c.reference) / (1.0 + c.effect * (x - c.reference)),
                            Form::Exponential => x - c.reference,
                        };
                    }
                    _ => {}
                }
                row
            })
            .collect();
        Some((mu, d))
    }

    /// ∂Ω/∂φₖ for the entries of φ that move Ω (`None` for the others).
    pub fn omega_slope(&self, k: usize, omega: &Mat) -> Option<Mat> {
        let mut s = [[0.0; MAX]; MAX];
        match self.free[k] {
            Free::LogSd(p) => {
                // Ωₚₚ = ω², Ωₚⱼ = ρ ωₚ ωⱼ: each scales with ωₚ.
                for j in 0..self.n {
                    s[p][j] = if j == p { 2.0 * omega[p][p] } else { omega[p][j] };
                    s[j][p] = s[p][j];
                }
            }
            Free::Correlation(i, j) => {
                let rho = omega[i][j] / (omega[i][i] * omega[j][j]).sqrt();
                let slope = (1.0 - rho * rho) * (omega[i][i] * omega[j][j]).sqrt();
                s[i][j] = slope;
                s[j][i] = slope;
            }
            _ => return None,
        }
        Some(s)
    }

    /// A name for each entry of φ, for messages.
    pub fn name(&self, k: usize) -> String {
        key(&self.base, self.free[k])
    }
}

/// The model file's key of a value (as `[estimation] hold` names it).
pub fn key(model: &PopulationModel, free: Free) -> String {
    match free {
        Free::Typical(p) => {
            ["clearance.typical_l_h", "volume.typical_l", "absorption.typical_ka_per_h"][p].into()
        }
        Free::Effect { p, e } => {
            let table = ["clearance", "volume"][p];
            let parameter = [&model.clearance, &model.volume][p];
            format!("{table}.covariates.{}", parameter.covariates[e].covariate)
        }
        Free::LogSd(p) => ["clearance.bsv_cv", "volume.bsv_cv", "absorption.bsv_cv"][p].into(),
        Free::Correlation(i, j) => format!("correlation.{}_{}", EFFECTS[i], EFFECTS[j]),
        Free::Additive => "residual.additive_mg_l".into(),
        Free::Proportional => "residual.proportional_cv".into(),
    }
}
