//! The analyses the commands share, as library calls: load a study, fit it, plan a subject's
//! regimen, sweep regimens over a virtual population, and build a report. The binary's
//! commands only turn flags into a [`crate::spec::Spec`], call these, and print.
//!
//! ```no_run
//! use cistern::spec::{Needs, Spec};
//! use cistern::workflow::{Required, Study};
//!
//! let spec = cistern::case::read("demo-regimens/p01.toml")?;
//! let settings = spec.resolve(Needs { grid: true })?;
//! let study = Study::load(&spec.inputs, Required { model: true })?;
//! println!("{} subjects, seed {}", study.subjects.len(), settings.seed);
//! # Ok::<(), cistern::Error>(())
//! ```

pub mod plan;
pub mod report;
pub mod study;
pub mod sweep;

pub use plan::{NextLevel, PlanSubject, plan, planning_fit};
pub use study::{Required, Study, pick};
