//! Time the three parts of `cistern simulate` that issue 14 sets targets for, through the
//! library, one thread, beside the floors they are measured against
//! (`scripts/simulate-vs-numpy.py` runs this and the numpy references on the same inputs):
//!
//! ```text
//! cargo run --release --example simulate_timing -- DOSES.csv POINTS STEP_H REPEATS
//! ```
//!
//! - `read_doses`: reading and checking the doses file (`Table::read` + `parse_doses`).
//! - `engine_grid`: `engine::concentrations` for oral doses of 500 mg every 12 h (CL 4.2 L/h,
//!   V 48 L, ka 1.1/h, F 0.9) at POINTS times 0, STEP, 2·STEP, … (the grid of `--times`);
//!   `recurrence`: the per-step recurrence of the same model on the same grid, doses added at
//!   grid points (A ← e·A + ka·G·D, D ← e_a·D: the floor of a walk along a grid).
//! - `csv_rows`: the CSV rows `time_h,conc_mg_l` of those concentrations through the project's
//!   `CsvWriter` into memory; `shortest_floor`: the same numbers, shortest round-trip text
//!   (zmij) into one reused buffer with the commas and line ends, nothing else.
//!
//! Prints one JSON object of medians over REPEATS runs, in seconds.

use cistern::engine::{self, Params};
use cistern::io::doses::parse_doses;
use cistern::io::output::CsvWriter;
use cistern::io::table::Table;
use cistern::{Dose, Error, Route};
use std::hint::black_box;
use std::time::Instant;

fn median(mut runs: Vec<f64>) -> f64 {
    runs.sort_by(f64::total_cmp);
    runs[runs.len() / 2]
}

fn timed<T>(repeats: usize, mut work: impl FnMut() -> T) -> f64 {
    median(
        (0..repeats)
            .map(|_| {
                let start = Instant::now();
                black_box(work());
                start.elapsed().as_secs_f64()
            })
            .collect(),
    )
}

fn main() -> Result<(), Error> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let usage = || Error::Usage("arguments: DOSES.csv POINTS STEP_H REPEATS".into());
    let [doses_csv, points, step, repeats] = &args[..] else {
        return Err(usage());
    };
    let points: usize = points.parse().map_err(|_| usage())?;
    let step: f64 = step.parse().map_err(|_| usage())?;
    let repeats: usize = repeats.parse().map_err(|_| usage())?;

    let read_doses = timed(repeats, || {
        let table = Table::read(doses_csv).expect("the doses file reads");
        parse_doses(&table).expect("the doses file is valid")
    });

    let params = Params { cl_l_h: 4.2, v_l: 48.0, ka_per_h: Some(1.1), f: 0.9, tlag_h: 0.0 };
    let times: Vec<f64> = (0..points).map(|i| i as f64 * step).collect();
    let every = (12.0 / step).round() as usize;
    let doses: Vec<Dose> = (0..points)
        .step_by(every)
        .map(|i| Dose { time_h: i as f64 * step, amount_mg: 500.0, route: Route::Oral, duration_h: 0.0 })
        .collect();
    params.validate(&doses)?;
    let engine_grid = timed(repeats, || engine::concentrations(&params, &doses, &times));

    let (k, ka) = (params.k_per_h(), 1.1);
    let (e, ea) = ((-k * step).exp(), (-ka * step).exp());
    let ka_g = ka * ((-k * step).exp() - (-ka * step).exp()) / (ka - k);
    let recurrence = timed(repeats, || {
        let mut out = vec![0.0; points];
        let (mut a, mut d) = (0.0, 0.0);
        for (i, c) in out.iter_mut().enumerate() {
            if i % every == 0 {
                d += params.f * 500.0;
            }
            *c = a / params.v_l;
            (a, d) = (e * a + ka_g * d, ea * d);
        }
        out
    });

    let conc = engine::concentrations(&params, &doses, &times);
    let csv_rows = timed(repeats, || {
        let mut w = CsvWriter::new(Vec::with_capacity(points * 40));
        for (t, c) in times.iter().zip(&conc) {
            w.number(*t).and_then(|()| w.number(*c)).and_then(|()| w.end_row()).expect("in memory");
        }
        w.finish().expect("in memory")
    });
    let shortest_floor = timed(repeats, || {
        let mut out: Vec<u8> = Vec::with_capacity(points * 40);
        let mut buffer = zmij::Buffer::new();
        for (t, c) in times.iter().zip(&conc) {
            out.extend_from_slice(buffer.format_finite(*t).as_bytes());
            out.push(b',');
            out.extend_from_slice(buffer.format_finite(*c).as_bytes());
            out.push(b'\n');
        }
        out
    });
    println!(
        "{{\"read_doses\": {read_doses}, \"engine_grid\": {engine_grid}, \"recurrence\": {recurrence}, \
         \"csv_rows\": {csv_rows}, \"shortest_floor\": {shortest_floor}}}"
    );
    Ok(())
}
