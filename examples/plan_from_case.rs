//! Fit one subject and plan a regimen through the library alone, without the command line:
//!
//! ```text
//! cargo run --release --no-default-features --example plan_from_case -- demo-regimens/p01.toml
//! ```
//!
//! Not clinical advice: the printed figures are model calculations for research; dosing
//! decisions belong to licensed clinicians following local protocols.

use cistern::workflow::plan;
use cistern::{Error, Needs, NextLevel, PlanSubject, Required, Seeds, Study, case};

fn main() -> Result<(), Error> {
    let path = std::env::args().nth(1).unwrap_or_else(|| "demo-regimens/p01.toml".into());
    let spec = case::read(&path)?;
    let settings = spec.resolve(Needs { grid: true })?;
    let study = Study::load(&spec.inputs, Required { model: true, levels: true })?;
    let model = study.model.as_ref().ok_or_else(|| Error::Usage("the case names no model".into()))?;
    let seeds = Seeds(settings.seed);
    let (subject, fit) = PlanSubject::fitted(study.subject(&spec.subject)?, model, seeds, settings.draws)?;
    println!(
        "{}: CL {:.3} L/h, V {:.2} L",
        subject.id.as_deref().unwrap_or("subject"),
        fit.parameters.cl_l_h,
        fit.parameters.v_l
    );
    let grid = settings.grid.as_ref().ok_or_else(|| Error::Usage("the case has no candidate grid".into()))?;
    let outcome = plan(&subject, grid, settings.start_h, NextLevel::default(), seeds)?;
    match &outcome.plan.recommended {
        Some(r) => println!(
            "recommended from {} h: {} (PTA {:.1} %)",
            r.start_h,
            r.assessment.regimen.describe(),
            100.0 * r.assessment.pta
        ),
        None => println!("no candidate meets every limit"),
    }
    println!("{}", cistern::CAUTION);
    Ok(())
}
