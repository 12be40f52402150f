//! The flags that name a study's files (or a case file naming them), shared by the commands
//! that read one (`fit`, `plan`).

use cistern::Origin;
use cistern::spec::{Spec, Stated};
use cistern::{Error, case};
use clap::Args;
use std::path::PathBuf;

/// Where the data are.
#[derive(Args, Debug, Clone)]
pub struct StudyArgs {
    /// A case file (TOML) naming the input files and settings; flags override it
    #[arg(long, value_name = "FILE")]
    pub case: Option<String>,
    /// Population model (TOML): the prior of a Bayesian (MAP) fit and of planning
    #[arg(long, value_name = "FILE")]
    pub model: Option<String>,
    /// Doses CSV
    #[arg(long, value_name = "FILE")]
    pub doses: Option<String>,
    /// Levels CSV (time_<unit>, conc_<unit>, optional subject and lloq_<unit>)
    #[arg(long, value_name = "FILE")]
    pub levels: Option<String>,
    /// Covariates CSV (subject plus columns such as weight_kg, age_y, sex, scr_mg_dl, crcl_ml_min)
    #[arg(long, value_name = "FILE")]
    pub covariates: Option<String>,
    /// A covariate for every subject, NAME=VALUE (e.g. weight_kg=70, sex=F); repeatable
    #[arg(long = "covariate", value_name = "NAME=VALUE")]
    pub covariate: Vec<String>,
}

impl StudyArgs {
    /// The spec: the case file's (when one is given) with these flags over it.
    pub fn spec(&self) -> Result<Spec, Error> {
        let mut spec = match &self.case {
            Some(path) => case::read(path)?,
            None => Spec::new(),
        };
        let i = &mut spec.inputs;
        let path = |p: &Option<String>| p.as_ref().map(PathBuf::from);
        i.model.set("--model", path(&self.model));
        i.doses.set("--doses", path(&self.doses));
        i.levels.set("--levels", path(&self.levels));
        i.covariates.set("--covariates", path(&self.covariates));
        let flag = Origin::Flag("--covariate".into());
        i.covariate =
            self.covariate.iter().map(|c| Stated { value: c.clone(), origin: flag.clone() }).collect();
        Ok(spec)
    }
}
