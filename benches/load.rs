//! Loading a study: `Study::load` (reading and matching the doses and levels files by subject)
//! for 10,000 and 40,000 sparse subjects, to show that the cost grows linearly with the
//! subjects. A tenth more subjects have doses and no levels, so the loader's note on the
//! subjects it leaves out is part of the work.
//!
//! Run with `cargo bench --bench load`; docs/performance.md records the figures.

use cistern::{Required, Spec, Study};
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use std::fmt::Write as _;
use std::hint::black_box;
use std::path::Path;
use std::time::Duration;

/// The doses and levels files of `n` sparse subjects (invented benchmark data: 4–20 one-hour
/// infusions and 2–4 levels each, as in `benches/fit.rs`), and `n / 10` with doses only.
fn write_study(dir: &Path, n: usize) -> (String, String) {
    let (mut doses, mut levels) = (
        String::from("subject,time_h,amount_mg,route,duration_h\n"),
        String::from("subject,time_h,conc_mg_l\n"),
    );
    for i in 0..n {
        let n_doses = 4 + i % 17;
        let mut last = 0.0;
        for d in 0..n_doses {
            last = d as f64 * 12.0 + ((d * 37 + i) % 5) as f64 * 0.25;
            let _ = writeln!(doses, "S{i},{last},{},infusion,1", 750 + ((i + d) % 3) * 250);
        }
        for l in 0..2 + i % 3 {
            let _ = writeln!(levels, "S{i},{},{}", last - 0.5 + l as f64 * 3.5, 8 + (i * 13 + l * 7) % 20);
        }
    }
    for i in n..n + n / 10 {
        let _ = writeln!(doses, "X{i},0,1000,infusion,1");
    }
    let paths = (dir.join(format!("doses{n}.csv")), dir.join(format!("levels{n}.csv")));
    std::fs::write(&paths.0, doses).expect("doses file");
    std::fs::write(&paths.1, levels).expect("levels file");
    (paths.0.to_string_lossy().into_owned(), paths.1.to_string_lossy().into_owned())
}

fn benches(c: &mut Criterion) {
    let dir = tempfile::tempdir().expect("temporary directory");
    let mut g = c.benchmark_group("load");
    g.sample_size(10).measurement_time(Duration::from_secs(10));
    for n in [10_000, 40_000] {
        let (doses, levels) = write_study(dir.path(), n);
        let mut spec = Spec::new();
        spec.inputs.doses.value = Some(doses.into());
        spec.inputs.levels.value = Some(levels.into());
        g.throughput(Throughput::Elements(n as u64));
        g.bench_function(format!("study_{n}_subjects"), |b| {
            b.iter(|| {
                let study =
                    Study::load(&spec.inputs, Required { model: false, levels: true }).expect("study");
                black_box(study.subjects.len())
            })
        });
    }
    g.finish();
}

criterion_group!(load, benches);
criterion_main!(load);
