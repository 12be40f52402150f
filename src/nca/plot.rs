//! The plot of one subject's dosing interval: its levels on a log scale, the levels the
//! terminal line goes through marked, and the line itself, as a report panel (drawn as SVG by
//! `report::svg`, or in a PDF).

use crate::nca::IntervalNca;
use crate::report::layout::{Marker, PlotSpec, Rgb, Series, Stroke};

const GREY: Rgb = (0.35, 0.35, 0.35);
const ORANGE: Rgb = (0.85, 0.4, 0.0);
const BLUE: Rgb = (0.1, 0.35, 0.7);

/// The panel of one interval (levels of zero cannot be drawn on a log scale and are left out).
pub fn panel(r: &IntervalNca) -> PlotSpec {
    let positive: Vec<_> = r.levels.iter().filter(|s| s.c > 0.0).collect();
    let markers = positive.iter().map(|s| Marker { x: s.t, y: s.c, hollow: false }).collect();
    let mut series = Vec::new();
    if let Some(t) = &r.terminal {
        let used: Vec<_> = positive.iter().filter(|s| s.t >= t.from_h && s.t <= t.to_h).collect();
        series.push(Series {
            label: format!("the {} levels of the terminal line", t.points),
            xs: used.iter().map(|s| s.t).collect(),
            ys: used.iter().map(|s| s.c).collect(),
            stroke: Stroke::Solid,
            color: ORANGE,
        });
        // The fitted line over its levels and on to the last level.
        let end = r.tlast_h.unwrap_or(t.to_h).max(t.to_h);
        series.push(Series {
            label: format!("terminal line, slope {:.4} 1/h", -t.lambda_z_per_h),
            xs: vec![t.from_h, end],
            ys: vec![t.at(t.from_h), t.at(end)],
            stroke: Stroke::Dashed,
            color: BLUE,
        });
    }
    PlotSpec {
        title: format!("{}, dose {}", r.subject.as_deref().unwrap_or("subject"), r.interval),
        x_label: "time after the dose (h)".into(),
        y_label: "concentration (mg/L)".into(),
        log_y: true,
        bands: Vec::new(),
        target: None,
        series,
        hlines: Vec::new(),
        markers,
        markers_label: "measured levels".into(),
        doses: vec![crate::report::layout::DoseTick { x: 0.0, color: GREY }],
        start_x: None,
    }
}
