//! The VPC as report panels (drawn as SVG by `report::svg`, or in a PDF): the observed levels,
//! the 90 % interval of each simulated percentile shaded, the observed percentiles as lines;
//! and, when some levels have a limit, the fraction below it beside its interval. A value below
//! the limit has no place on the plot: a band or line is drawn over the runs of bins where it
//! has values (only the first run carries the legend label).

use super::{Compared, Vpc};
use crate::report::layout::{Band, Marker, PlotSpec, Rgb, Series, Stroke};
use crate::report::plot::{Figure, plot_scene};

const BLUE: Rgb = (0.2, 0.4, 0.75);
const RED: Rgb = (0.8, 0.2, 0.2);
const INK: Rgb = (0.1, 0.1, 0.1);

/// Runs of consecutive bins where a statistic has a value: (x, value) pairs.
fn runs(x: &[f64], values: &[Option<[f64; 2]>]) -> Vec<Vec<(f64, [f64; 2])>> {
    let mut out = Vec::new();
    let mut current = Vec::new();
    for (&x, v) in x.iter().zip(values) {
        match v {
            Some(v) => current.push((x, *v)),
            None if !current.is_empty() => out.push(std::mem::take(&mut current)),
            None => {}
        }
    }
    if !current.is_empty() {
        out.push(current);
    }
    out
}

/// Bands (the interval) and a line (the observed) of one statistic across the bins.
fn statistic(
    x: &[f64],
    compared: &[&Compared],
    (band_label, line_label): (String, String),
    color: Rgb,
    stroke: Stroke,
    spec: &mut PlotSpec,
) {
    let interval: Vec<Option<[f64; 2]>> =
        compared.iter().map(|c| c.simulated_lo.zip(c.simulated_hi).map(|(a, b)| [a, b])).collect();
    for (i, run) in runs(x, &interval).into_iter().enumerate() {
        spec.bands.push(Band {
            label: if i == 0 { band_label.clone() } else { String::new() },
            xs: run.iter().map(|r| r.0).collect(),
            lo: run.iter().map(|r| r.1[0]).collect(),
            hi: run.iter().map(|r| r.1[1]).collect(),
            color,
        });
    }
    let observed: Vec<Option<[f64; 2]>> = compared.iter().map(|c| c.observed.map(|o| [o, o])).collect();
    for (i, run) in runs(x, &observed).into_iter().enumerate() {
        spec.series.push(Series {
            label: if i == 0 { line_label.clone() } else { String::new() },
            xs: run.iter().map(|r| r.0).collect(),
            ys: run.iter().map(|r| r.1[0]).collect(),
            stroke,
            color: INK,
        });
    }
}

/// The x-axis label of the binning time.
fn x_label(vpc: &Vpc) -> String {
    if vpc.bin_by == "time" { "time (h)".into() } else { "time after the dose (h)".into() }
}

/// The panels: the percentiles, then (when any level has a limit) the fraction below it.
pub fn panels(vpc: &Vpc) -> Vec<PlotSpec> {
    let x: Vec<f64> = vpc.bins.iter().map(|b| b.mid_h).collect();
    let corrected = if vpc.prediction_corrected { "prediction-corrected " } else { "" };
    let mut spec = PlotSpec::empty(
        format!("Visual predictive check ({} replicates)", vpc.replicates),
        x_label(vpc),
        format!("{corrected}concentration (mg/L)"),
    );
    spec.markers = vpc
        .observed
        .iter()
        .filter_map(|o| match (o.value_mg_l, o.lloq_mg_l) {
            (Some(y), _) => Some(Marker { x: o.x_h, y, hollow: false }),
            (None, Some(l)) => Some(Marker { x: o.x_h, y: l, hollow: true }),
            (None, None) => None,
        })
        .collect();
    spec.markers_label = format!("{corrected}observed levels");
    for (k, (percent, color, stroke)) in
        [(5, BLUE, Stroke::Dashed), (50, RED, Stroke::Solid), (95, BLUE, Stroke::Dashed)]
            .into_iter()
            .enumerate()
    {
        let compared: Vec<&Compared> = vpc.bins.iter().map(|b| b.percentiles()[k].1).collect();
        let name = if percent == 50 { "median".to_string() } else { format!("{percent}th percentile") };
        let labels = (format!("90 % interval of the simulated {name}"), format!("observed {name}"));
        statistic(&x, &compared, labels, color, stroke, &mut spec);
    }
    // A log scale when everything drawn is positive.
    let drawn = spec.bands.iter().flat_map(|b| b.lo.iter().chain(&b.hi));
    let drawn = drawn.chain(spec.series.iter().flat_map(|s| &s.ys)).chain(spec.markers.iter().map(|m| &m.y));
    spec.log_y = drawn.into_iter().all(|&v| v > 0.0);
    let mut out = vec![spec];
    if vpc.observed.iter().any(|o| o.lloq_mg_l.is_some()) {
        let mut blq = PlotSpec::empty(
            "Fraction below the quantification limit",
            x_label(vpc),
            "fraction below the limit",
        );
        let compared: Vec<&Compared> = vpc.bins.iter().map(|b| &b.blq_fraction).collect();
        let labels = ("90 % interval of the simulated fraction".into(), "observed fraction".into());
        statistic(&x, &compared, labels, RED, Stroke::Solid, &mut blq);
        out.push(blq);
    }
    out
}

/// The panels as one report figure (`vpc.svg`), one panel per row, as the population report
/// shows them after the diagnostic plots.
pub fn figure(vpc: &Vpc) -> Figure {
    Figure {
        file: "vpc.svg",
        title: String::new(),
        panels: panels(vpc).iter().map(|p| plot_scene(p, 480.0, 300.0)).collect(),
        columns: 1,
    }
}
