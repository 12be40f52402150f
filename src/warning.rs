//! A warning a result carries: a stable code for programs beside a message for people.
//!
//! In JSON every warning is `{"code": "...", "message": "..."}`; the codes are a contract
//! (docs/formats.md lists them), the messages may be reworded.

use serde::Serialize;

/// What a warning is about. The serialised names are the stable codes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Code {
    /// The optimiser (or the population estimation) did not converge.
    NotConverged,
    /// Another start found a different, worse local optimum.
    WorseOptimum,
    /// Another, different set of parameters fits equally well.
    EqualOptimum,
    /// Absorption and elimination rates can be exchanged with the same fit.
    FlipFlop,
    /// Few effective posterior draws: the intervals are rough.
    FewEffectiveDraws,
    /// The posterior could not be sampled: no intervals.
    NoPosterior,
    /// An individual estimate lies far in the tail of the population distribution.
    FarFromTypical,
    /// The levels carry little information on a parameter.
    LittleInformation,
    /// A level lies far from its prediction.
    Outlier,
    /// An estimate is outside the model's plausible range.
    ImplausibleEstimate,
    /// Levels below the quantification limit are left out.
    BlqLeftOut,
    /// The design or the data do not identify every estimated value.
    NotIdentifiable,
    /// The estimates ran off to implausible values.
    RanOff,
    /// No standard errors can be given.
    NoStandardErrors,
    /// The two-level method's assumptions.
    TwoLevelAssumptions,
    /// The regimen may not be at steady state.
    NotSteadyState,
    /// High η-shrinkage: the individual estimates say little about the individuals.
    HighShrinkage,
    /// The residuals show that the one-compartment model does not describe the levels.
    ModelMisfit,
    /// The estimates move strongly with the least-squares weighting.
    WeightingDependent,
}

/// One warning.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Warning {
    /// The stable code.
    pub code: Code,
    /// What happened and what to do, in plain language.
    pub message: String,
}

impl Warning {
    /// A warning with its code.
    pub fn new(code: Code, message: impl Into<String>) -> Warning {
        Warning { code, message: message.into() }
    }
}

impl std::fmt::Display for Warning {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.message)
    }
}
