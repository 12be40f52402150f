//! The flags that state targets, safety limits and a grid of candidate regimens, shared by the
//! commands that compare regimens (`sweep`, `plan`): each claims its setting of the spec.

use super::args::flag_number;
use cistern::Origin;
use cistern::error::Problems;
use cistern::spec::{Spec, Stated};
use clap::Args;

/// Targets, limits and the candidate grid.
#[derive(Args, Debug, Clone, Default)]
pub struct GridArgs {
    /// A target METRIC=LO..HI (either bound may be left out), repeatable: auc24, auc_day<N>,
    /// trough, peak, cavg, or above=C..@P% (at least P % of the interval above C), e.g.
    /// auc24=400..600, trough=10..20mg/l, above=2mg/l..@60%
    #[arg(long = "target", value_name = "METRIC=LO..HI", allow_hyphen_values = true)]
    pub targets: Vec<String>,
    /// Amounts to try: LO..HI/STEP or a list, e.g. 500..3000/250, 0.5g..3g/250mg, 750,1g
    #[arg(long, value_name = "AMOUNTS", allow_hyphen_values = true)]
    pub amounts: Option<String>,
    /// Dosing intervals to try, e.g. 6h,8h,12h,24h
    #[arg(long, value_name = "LIST", allow_hyphen_values = true)]
    pub every: Option<String>,
    /// Route of the candidates: bolus, infusion or oral [default: infusion]
    #[arg(long, value_name = "ROUTE")]
    pub route: Option<String>,
    /// Infusion durations to try, e.g. 1h,90min,2h [default with --max-rate: for each amount
    /// the shortest whole half hour, at least 1 h, that keeps within the rate limit]
    #[arg(long, value_name = "LIST", allow_hyphen_values = true)]
    pub durations: Option<String>,
    /// Largest single dose, e.g. 3g
    #[arg(long, value_name = "AMOUNT", allow_hyphen_values = true)]
    pub max_dose: Option<String>,
    /// Largest total dose over 24 h, e.g. 4g
    #[arg(long, value_name = "AMOUNT", allow_hyphen_values = true)]
    pub max_daily: Option<String>,
    /// Fastest infusion, with its unit, e.g. 10mg/min or 600mg/h
    #[arg(long, value_name = "RATE", allow_hyphen_values = true)]
    pub max_rate: Option<String>,
    /// Highest acceptable steady-state peak, e.g. 40 (mg/L)
    #[arg(long, value_name = "CONC", allow_hyphen_values = true)]
    pub max_peak: Option<String>,
    /// Highest acceptable steady-state trough, e.g. 20 (mg/L)
    #[arg(long, value_name = "CONC", allow_hyphen_values = true)]
    pub max_trough: Option<String>,
    /// Shortest acceptable dosing interval, e.g. 6h
    #[arg(long, value_name = "TIME", allow_hyphen_values = true)]
    pub min_every: Option<String>,
    /// Largest acceptable probability of breaking an exposure limit (0 to below 1)
    /// [default: 0.1]
    #[arg(long, value_name = "P", allow_hyphen_values = true)]
    pub max_risk: Option<String>,
}

impl GridArgs {
    /// Put the flags given over the spec's settings (a case file's, or none).
    pub fn apply(&self, spec: &mut Spec, problems: &mut Problems) {
        let g = &mut spec.grid;
        let targets =
            self.targets.iter().map(|t| Stated { value: t.clone(), origin: Origin::Flag("--target".into()) });
        g.targets.set("--target", Some(targets.collect::<Vec<_>>()).filter(|t| !t.is_empty()));
        g.amounts.set("--amounts", self.amounts.clone());
        g.every.set("--every", self.every.clone());
        g.route.set("--route", self.route.clone());
        g.durations.set("--durations", self.durations.clone());
        let l = &mut g.limits;
        l.max_dose.set("--max-dose", self.max_dose.clone());
        l.max_daily.set("--max-daily", self.max_daily.clone());
        l.max_rate.set("--max-rate", self.max_rate.clone());
        l.max_peak.set("--max-peak", self.max_peak.clone());
        l.max_trough.set("--max-trough", self.max_trough.clone());
        l.min_every.set("--min-every", self.min_every.clone());
        let risk = self.max_risk.as_ref().and_then(|t| problems.take(flag_number("--max-risk", t)));
        l.max_risk.set("--max-risk", risk);
    }
}
