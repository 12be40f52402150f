//! cistern: a dosing planner for drugs with one-compartment, first-order (linear) kinetics.
//!
//! The library does all the work; the `cistern` binary parses arguments and prints. An
//! analysis is a [`Spec`] (read from a case file by [`case::read`], or built in code), resolved
//! once; [`workflow`] loads its study, fits the subject and plans a regimen:
//!
//! ```
//! use cistern::workflow::plan;
//! use cistern::{Needs, NextLevel, PlanSubject, Required, Seeds, Study};
//!
//! let spec = cistern::case::read("demo-regimens/p01.toml")?;
//! let settings = spec.resolve(Needs { grid: true })?;
//! let study = Study::load(&spec.inputs, Required { model: true, levels: true })?;
//! let (model, grid) = (study.model.as_ref().unwrap(), settings.grid.as_ref().unwrap());
//! let seeds = Seeds(settings.seed);
//! let (subject, fit) = PlanSubject::fitted(study.subject(&spec.subject)?, model, seeds, 200)?;
//! let outcome = plan(&subject, grid, settings.start_h, NextLevel::default(), seeds)?;
//! let best = outcome.plan.recommended.expect("a regimen within every limit");
//! println!("CL {:.2} L/h: {}", fit.parameters.cl_l_h, best.assessment.regimen.describe());
//! # Ok::<(), cistern::Error>(())
//! ```
//!
//! Every result is a model calculation for research, not clinical advice: show [`CAUTION`]
//! with it. Data flows one way: [`io`] → [`spec`] → [`workflow`] → [`engine`], [`fit`],
//! [`plan`], [`sweep`] → typed results → [`io::output`] and [`report`]. docs/architecture.md
//! says where each piece lives; docs/methods.md gives every equation and its source.

#![forbid(unsafe_code)]
#![deny(clippy::float_cmp)]
#![warn(missing_docs)]

pub mod case;
pub mod choice;
pub mod covariates;
pub mod diagnostics;
pub mod dosing;
pub mod engine;
pub mod error;
pub mod fit;
pub mod io;
pub mod limits;
pub mod model;
pub mod nca;
pub mod plan;
pub mod population;
pub mod report;
pub mod seeds;
pub mod spec;
pub mod stats;
pub mod sweep;
pub mod units;
pub mod verify;
pub mod warning;
pub mod workflow;

pub use covariates::Covariates;
pub use dosing::{Dose, Regimen, Route, Schedule};
pub use engine::Params;
pub use error::{Error, InputError, Origin, Result};
pub use fit::{FitOptions, FitResult, SubjectData, fit_all, fit_subject};
pub use io::output::CAUTION;
pub use model::PopulationModel;
pub use seeds::Seeds;
pub use spec::{Needs, Spec};
pub use workflow::{NextLevel, PlanSubject, Required, Study};
