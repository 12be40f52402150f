//! The analyses the commands share, as library calls: load a study, fit it, plan a subject's
//! regimen, sweep regimens over a virtual population, and build a report. The binary's
//! commands only turn flags into a [`crate::spec::Spec`], call these, and print. The crate's
//! front page shows a plan made through them.

pub mod plan;
pub mod population;
pub mod report;
pub mod study;
pub mod sweep;

pub use plan::{NextLevel, PlanSubject, plan, planning_fit};
pub use study::{Required, Study};
