//! The flags that name a study's files (or a case file naming them), shared by the commands
//! that read one (`fit`, `plan`, `population`; `nca` and `check` take the ADPPK flags).

use cistern::Origin;
use cistern::spec::{Inputs, Spec, Stated};
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
    #[command(flatten)]
    pub adppk: AdppkArgs,
}

/// An ADPPK dataset instead of the doses, levels and covariates files.
#[derive(Args, Debug, Clone, Default)]
pub struct AdppkArgs {
    /// ADPPK dataset (CSV, CDISC ADaM population PK) holding the doses, levels and baseline
    /// covariates, instead of --doses, --levels and --covariates
    #[arg(long, value_name = "FILE")]
    pub adppk: Option<String>,
    /// The analyte (PARAMCD) to read from an ADPPK file that holds several
    #[arg(long, value_name = "PARAMCD")]
    pub analyte: Option<String>,
    /// Read our variable OURS from the ADPPK column THEIRS, stating a unit where ADPPK has none
    /// (e.g. amount_mg=AMT, crcl_ml_min=CRCLBL, duration_h=TINF); repeatable
    #[arg(long, value_name = "OURS=THEIRS")]
    pub map: Vec<String>,
}

impl AdppkArgs {
    /// Put the ADPPK flags into the inputs, over a case file's.
    pub fn apply(&self, inputs: &mut Inputs) {
        inputs.adppk.set("--adppk", self.adppk.as_ref().map(PathBuf::from));
        let options = &mut inputs.adppk_options;
        if let Some(a) = &self.analyte {
            options.analyte = Some(Stated { value: a.clone(), origin: Origin::Flag("--analyte".into()) });
        }
        if !self.map.is_empty() {
            let flag = Origin::Flag("--map".into());
            options.map =
                self.map.iter().map(|m| Stated { value: m.clone(), origin: flag.clone() }).collect();
        }
    }
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
        self.adppk.apply(i);
        Ok(spec)
    }
}
