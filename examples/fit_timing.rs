//! Time each subject's fit of a study through the library, one thread, for the side-by-side
//! comparison with the scipy and numpy references (`scripts/fit_side_by_side.py` runs both on
//! the same files):
//!
//! ```text
//! cargo run --release --example fit_timing -- MODEL DOSES LEVELS laplace|posterior REPEATS
//! ```
//!
//! Prints one JSON object: the median, 10th and 90th percentile of the per-subject times (µs)
//! over every subject and repeat, and each subject's estimates, so the script can check that
//! both sides found the same optima. Reading the files is not timed.

use cistern::fit::Intervals;
use cistern::{Error, FitOptions, Required, Seeds, Spec, Study, fit_subject};
use std::hint::black_box;
use std::time::Instant;

fn main() -> Result<(), Error> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [model, doses, levels, intervals, repeats] = &args[..] else {
        return Err(Error::Usage("arguments: MODEL DOSES LEVELS laplace|posterior REPEATS".into()));
    };
    let intervals = match intervals.as_str() {
        "laplace" => Intervals::Laplace,
        _ => Intervals::Posterior,
    };
    let repeats: usize = repeats.parse().map_err(|_| Error::Usage("REPEATS is a whole number".into()))?;
    let mut spec = Spec::new();
    spec.inputs.model.value = Some(model.into());
    spec.inputs.doses.value = Some(doses.into());
    spec.inputs.levels.value = Some(levels.into());
    let study = Study::load(&spec.inputs, Required { model: true, levels: true })?;
    let model = study.model.as_ref().ok_or_else(|| Error::Usage("no model".into()))?;
    let options = FitOptions { intervals, ..FitOptions::default() };
    let seeds = Seeds(options.seed);
    let mut times = Vec::new();
    let mut estimates = Vec::new();
    for round in 0..repeats {
        for s in &study.subjects {
            let start = Instant::now();
            let fit = black_box(fit_subject(s, Some(model), &options, seeds.subject(s.id.as_deref())));
            times.push(start.elapsed().as_secs_f64() * 1e6);
            if round == 0 {
                let p = fit?.parameters;
                estimates.push(format!("[{:?},{:?}]", p.cl_l_h, p.v_l));
            }
        }
    }
    times.sort_by(f64::total_cmp);
    let q = |p: f64| times[((times.len() - 1) as f64 * p).round() as usize];
    println!(
        "{{\"median_us\":{:?},\"p10_us\":{:?},\"p90_us\":{:?},\"estimates\":[{}]}}",
        q(0.5),
        q(0.1),
        q(0.9),
        estimates.join(",")
    );
    Ok(())
}
