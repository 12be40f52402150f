//! Plot geometry shared by the PDF and SVG backends: axis ranges and ticks, the mapping of data
//! to a panel, clipping, and the legend. A plot is laid out once as a [`Scene`] of simple
//! shapes in points (y downward from the panel's top-left corner); each backend only
//! translates shapes, so both draw the same picture.

use super::layout::{PlotSpec, Rgb, Stroke};
use super::text::{self, Face};

/// A position in a scene, in points: x to the right, y downward from the top-left corner.
pub type Pos = (f64, f64);

/// Where a text's anchor point lies along the text.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Anchor {
    /// The text starts at the anchor.
    Start,
    /// The text is centred on the anchor.
    Middle,
    /// The text ends at the anchor.
    End,
}

/// A drawing primitive.
#[derive(Debug, Clone, PartialEq)]
pub enum Shape {
    /// Stroked polylines (one per run; a run never has fewer than two points).
    Line {
        /// What the line shows (an SVG class: `series`, `grid`, `frame`, …).
        class: &'static str,
        /// The runs.
        runs: Vec<Vec<Pos>>,
        /// Stroke colour.
        color: Rgb,
        /// Stroke width in points.
        width: f64,
        /// Dash and gap lengths in points, or solid.
        dash: Option<(f64, f64)>,
    },
    /// A filled polygon without an outline.
    Fill {
        /// Corners.
        points: Vec<Pos>,
        /// Fill colour.
        color: Rgb,
    },
    /// A dot: filled, or hollow (white inside a coloured ring).
    Dot {
        /// Centre.
        center: Pos,
        /// Radius in points.
        radius: f64,
        /// Colour.
        color: Rgb,
        /// Drawn as a ring.
        hollow: bool,
    },
    /// One line of text, already mapped to what the builtin fonts can show.
    Text {
        /// The anchor point on the baseline.
        at: Pos,
        /// The text.
        text: String,
        /// Font size in points.
        size: f64,
        /// Font face.
        face: Face,
        /// Where the anchor lies along the text.
        anchor: Anchor,
        /// Rotated 90° counter-clockwise (reads upward), for a y-axis label.
        vertical: bool,
        /// Colour.
        color: Rgb,
    },
}

/// A laid-out panel.
#[derive(Debug, Clone, PartialEq)]
pub struct Scene {
    /// Width in points.
    pub width: f64,
    /// Height in points.
    pub height: f64,
    /// Shapes in drawing order.
    pub shapes: Vec<Shape>,
}

/// A tick on an axis; minor ticks have no label.
#[derive(Debug, Clone, PartialEq)]
pub struct Tick {
    /// Data value.
    pub value: f64,
    /// Label, for a major tick.
    pub label: Option<String>,
}

/// An axis: a data range, its scale and its ticks.
#[derive(Debug, Clone, PartialEq)]
pub struct Axis {
    /// Data value at the start of the axis.
    pub lo: f64,
    /// Data value at the end of the axis.
    pub hi: f64,
    /// Logarithmic scale.
    pub log: bool,
    /// Ticks inside [lo, hi].
    pub ticks: Vec<Tick>,
}

/// A tick step of 1, 2 or 5 × 10^k giving the number of intervals over `span` closest to
/// `target` (common practice, no source).
fn nice_step(span: f64, target: f64) -> f64 {
    let magnitude = 10f64.powf((span / target).log10().floor());
    let candidates = [1.0, 2.0, 5.0, 10.0, 20.0].map(|m| m * magnitude);
    let misfit = |step: f64| (span / step - target).abs();
    candidates.into_iter().fold(candidates[0], |best, s| if misfit(s) <= misfit(best) { s } else { best })
}

/// Decimals that show every multiple of `step` exactly.
fn decimals_for(step: f64) -> usize {
    (0..10)
        .find(|&d| ((step * 10f64.powi(d as i32)).round() - step * 10f64.powi(d as i32)).abs() < 1e-6)
        .unwrap_or(10)
}

/// A tick label: fixed decimals, and never "-0".
fn tick_label(value: f64, decimals: usize) -> String {
    let s = format!("{value:.decimals$}");
    if s.trim_start_matches('-').chars().all(|c| c == '0' || c == '.') {
        s.trim_start_matches('-').into()
    } else {
        s
    }
}

impl Axis {
    /// A linear axis over [lo, hi]. With `round_out` the ends move out to ticks (room above a
    /// curve); otherwise the axis spans the data exactly and the ticks fall inside.
    pub fn linear(lo: f64, hi: f64, round_out: bool) -> Axis {
        let (lo, hi) = if hi - lo > 1e-12 * hi.abs().max(1.0) {
            (lo, hi)
        } else if hi.abs() > 1e-300 {
            (lo - 0.5 * hi.abs(), hi + 0.5 * hi.abs())
        } else {
            (0.0, 1.0)
        };
        let step = nice_step(hi - lo, 5.0);
        let (lo, hi) =
            if round_out { ((lo / step).floor() * step, (hi / step).ceil() * step) } else { (lo, hi) };
        let decimals = decimals_for(step);
        let first = (lo / step - 1e-9).ceil() as i64;
        let last = (hi / step + 1e-9).floor() as i64;
        let ticks = (first..=last)
            .map(|k| {
                let value = k as f64 * step;
                Tick { value, label: Some(tick_label(value, decimals)) }
            })
            .collect();
        Axis { lo, hi, log: false, ticks }
    }

    /// A logarithmic axis from the decade at or below `min_positive` to the decade at or above
    /// `max`, spanning at least one and at most `max_decades` decades (lower values are
    /// clipped). Decades are labelled; 2 and 5 too when the axis spans two decades or less.
    pub fn log(min_positive: f64, max: f64, max_decades: i32) -> Axis {
        let top = max.log10().ceil() as i32;
        let bottom = (min_positive.log10().floor() as i32).max(top - max_decades).min(top - 1);
        let labelled: &[f64] = if top - bottom <= 2 { &[1.0, 2.0, 5.0] } else { &[1.0] };
        let mut ticks = Vec::new();
        for k in bottom..=top {
            let decade = 10f64.powi(k);
            for m in 1..10 {
                let value = f64::from(m) * decade;
                if value > 10f64.powi(top) * (1.0 + 1e-9) {
                    break;
                }
                let label = labelled.iter().any(|l| (l - f64::from(m)).abs() < 0.5).then(|| {
                    if (-4..=5).contains(&k) {
                        tick_label(value, (-k).max(0) as usize)
                    } else {
                        format!("{m}e{k}")
                    }
                });
                ticks.push(Tick { value, label });
            }
        }
        Axis { lo: 10f64.powi(bottom), hi: 10f64.powi(top), log: true, ticks }
    }

    /// Where `v` lies along the axis: 0 at `lo`, 1 at `hi`, beyond for values outside;
    /// NaN for values a log axis cannot show (≤ 0).
    pub fn fraction(&self, v: f64) -> f64 {
        if self.log {
            if v > 0.0 {
                (v.log10() - self.lo.log10()) / (self.hi.log10() - self.lo.log10())
            } else {
                f64::NAN
            }
        } else {
            (v - self.lo) / (self.hi - self.lo)
        }
    }
}

/// A rectangle in scene coordinates, (x0, y0) top-left, (x1, y1) bottom-right.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Frame {
    /// Left.
    pub x0: f64,
    /// Top.
    pub y0: f64,
    /// Right.
    pub x1: f64,
    /// Bottom.
    pub y1: f64,
}

impl Frame {
    fn contains(&self, (x, y): Pos) -> bool {
        let eps = 1e-9;
        x >= self.x0 - eps && x <= self.x1 + eps && y >= self.y0 - eps && y <= self.y1 + eps
    }

    fn corners(&self) -> Vec<Pos> {
        vec![(self.x0, self.y0), (self.x1, self.y0), (self.x1, self.y1), (self.x0, self.y1)]
    }
}

/// Maps data to a frame through two axes.
#[derive(Debug, Clone)]
pub struct Mapping {
    /// The x axis.
    pub x: Axis,
    /// The y axis.
    pub y: Axis,
    /// The data rectangle.
    pub frame: Frame,
}

impl Mapping {
    /// The scene position of a data point (NaN coordinates if the point cannot be shown).
    pub fn map(&self, x: f64, y: f64) -> Pos {
        let f = &self.frame;
        (f.x0 + self.x.fraction(x) * (f.x1 - f.x0), f.y1 - self.y.fraction(y) * (f.y1 - f.y0))
    }

    /// As [`map`](Self::map), with y values a log axis cannot show moved far below the frame,
    /// so that a filled region reaching down to zero is clipped at the frame's bottom.
    fn map_floor(&self, x: f64, y: f64) -> Pos {
        let (px, py) = self.map(x, y);
        let below = self.frame.y1 + 10.0 * (self.frame.y1 - self.frame.y0);
        (px, if py.is_finite() { py.min(below) } else { below })
    }
}

/// Clips the segment a–b to `frame` (Liang–Barsky), returning the visible part.
fn clip_segment(a: Pos, b: Pos, frame: &Frame) -> Option<(Pos, Pos)> {
    let (dx, dy) = (b.0 - a.0, b.1 - a.1);
    let mut t0: f64 = 0.0;
    let mut t1: f64 = 1.0;
    for (p, q) in [(-dx, a.0 - frame.x0), (dx, frame.x1 - a.0), (-dy, a.1 - frame.y0), (dy, frame.y1 - a.1)] {
        if p.abs() < 1e-12 {
            if q < 0.0 {
                return None;
            }
        } else {
            let t = q / p;
            if p < 0.0 {
                t0 = t0.max(t);
            } else {
                t1 = t1.min(t);
            }
        }
    }
    (t0 <= t1).then_some(((a.0 + t0 * dx, a.1 + t0 * dy), (a.0 + t1 * dx, a.1 + t1 * dy)))
}

/// Clips a polyline to `frame`: points that cannot be shown (NaN) break it, and the parts
/// outside the frame are cut away. Returns the visible runs.
pub fn clip_polyline(points: &[Pos], frame: &Frame) -> Vec<Vec<Pos>> {
    let mut runs: Vec<Vec<Pos>> = Vec::new();
    let mut current: Vec<Pos> = Vec::new();
    for pair in points.windows(2) {
        let (a, b) = (pair[0], pair[1]);
        let finite = a.0.is_finite() && a.1.is_finite() && b.0.is_finite() && b.1.is_finite();
        match finite.then(|| clip_segment(a, b, frame)).flatten() {
            Some((p, q)) => {
                let joins =
                    current.last().is_some_and(|l| (l.0 - p.0).abs() < 1e-9 && (l.1 - p.1).abs() < 1e-9);
                if !joins {
                    if current.len() >= 2 {
                        runs.push(std::mem::take(&mut current));
                    }
                    current.clear();
                    current.push(p);
                }
                current.push(q);
            }
            None => {
                if current.len() >= 2 {
                    runs.push(std::mem::take(&mut current));
                }
                current.clear();
            }
        }
    }
    if current.len() >= 2 {
        runs.push(current);
    }
    runs
}

/// Clips a polygon to `frame` (Sutherland–Hodgman; the frame is convex, so the result is one
/// polygon, possibly empty).
pub fn clip_polygon(points: &[Pos], frame: &Frame) -> Vec<Pos> {
    type Edge = (fn(Pos, &Frame) -> bool, fn(Pos, Pos, &Frame) -> Pos);
    fn at_x(a: Pos, b: Pos, x: f64) -> Pos {
        (x, a.1 + (b.1 - a.1) * (x - a.0) / (b.0 - a.0))
    }
    fn at_y(a: Pos, b: Pos, y: f64) -> Pos {
        (a.0 + (b.0 - a.0) * (y - a.1) / (b.1 - a.1), y)
    }
    let edges: [Edge; 4] = [
        (|p, f| p.0 >= f.x0, |a, b, f| at_x(a, b, f.x0)),
        (|p, f| p.0 <= f.x1, |a, b, f| at_x(a, b, f.x1)),
        (|p, f| p.1 >= f.y0, |a, b, f| at_y(a, b, f.y0)),
        (|p, f| p.1 <= f.y1, |a, b, f| at_y(a, b, f.y1)),
    ];
    let mut poly: Vec<Pos> = points.iter().copied().filter(|p| p.0.is_finite() && p.1.is_finite()).collect();
    for (inside, cross) in edges {
        let input = std::mem::take(&mut poly);
        for (i, &cur) in input.iter().enumerate() {
            let prev = input[(i + input.len() - 1) % input.len()];
            match (inside(cur, frame), inside(prev, frame)) {
                (true, true) => poly.push(cur),
                (true, false) => {
                    poly.push(cross(prev, cur, frame));
                    poly.push(cur);
                }
                (false, true) => poly.push(cross(prev, cur, frame)),
                (false, false) => {}
            }
        }
    }
    poly
}

/// Colour mixed with white: `amount` 0 keeps it, 1 gives white.
pub fn lighten((r, g, b): Rgb, amount: f32) -> Rgb {
    (r + (1.0 - r) * amount, g + (1.0 - g) * amount, b + (1.0 - b) * amount)
}

const INK: Rgb = (0.13, 0.13, 0.13);
const GRID: Rgb = (0.88, 0.88, 0.88);
const MUTED: Rgb = (0.35, 0.35, 0.35);
const MARKER: Rgb = (0.05, 0.05, 0.05);
const DOSE: Rgb = (0.45, 0.15, 0.55);
const TARGET: Rgb = (0.80, 0.92, 0.80);
const TARGET_EDGE: Rgb = (0.30, 0.60, 0.30);
/// Height of the shade on the meeting side of a one-sided target (points).
const ONE_SIDED_SHADE: f64 = 10.0;
#[cfg(feature = "pdf")]
pub(crate) const WHITE: Rgb = (1.0, 1.0, 1.0);
/// How much band colours are lightened.
const BAND_LIGHTEN: f32 = 0.72;

const TITLE_SIZE: f64 = 10.0;
const LABEL_SIZE: f64 = 9.0;
const TICK_SIZE: f64 = 8.0;
const LEGEND_SIZE: f64 = 8.0;
const DOT_RADIUS: f64 = 2.3;
const SERIES_DASH: (f64, f64) = (4.0, 2.5);
const HLINE_DASH: (f64, f64) = (1.2, 1.6);
const START_DASH: (f64, f64) = (3.0, 2.0);

/// What a legend entry's sample looks like.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Swatch {
    /// A line, solid or dashed.
    Line(Rgb, Option<(f64, f64)>),
    /// A filled box.
    Fill(Rgb),
    /// A dot, filled or hollow.
    Dot(bool),
    /// A short vertical tick (a dose), in its colour.
    Tick(Rgb),
}

/// One legend entry.
#[derive(Debug, Clone, PartialEq)]
pub struct LegendEntry {
    /// Label (mapped to WinAnsi).
    pub label: String,
    /// Sample.
    pub swatch: Swatch,
}

/// The legend of a panel, in drawing order of what it explains.
pub fn legend(spec: &PlotSpec) -> Vec<LegendEntry> {
    let mut entries = Vec::new();
    let mut push = |label: &str, swatch| {
        if !label.is_empty() {
            entries.push(LegendEntry { label: text::to_winansi(label), swatch });
        }
    };
    if let Some((_, _, label)) = &spec.target {
        push(label, Swatch::Fill(TARGET));
    }
    for band in &spec.bands {
        push(&band.label, Swatch::Fill(lighten(band.color, BAND_LIGHTEN)));
    }
    for series in &spec.series {
        let dash = (series.stroke == Stroke::Dashed).then_some(SERIES_DASH);
        push(&series.label, Swatch::Line(series.color, dash));
    }
    for line in &spec.hlines {
        push(&line.label, Swatch::Line(line.color, Some(HLINE_DASH)));
    }
    if spec.markers.iter().any(|m| !m.hollow) {
        push(&spec.markers_label, Swatch::Dot(false));
    }
    if spec.markers.iter().any(|m| m.hollow) {
        push("below the quantification limit (drawn at the limit)", Swatch::Dot(true));
    }
    if let Some(first) = spec.doses.first() {
        if spec.doses.iter().all(|d| d.color == first.color) {
            push("dose", Swatch::Tick(first.color));
        } else {
            push("dose (in the colour of its curve)", Swatch::Tick(DOSE));
        }
    }
    if spec.start_x.is_some() {
        push("start of the proposed regimen", Swatch::Line(MUTED, Some(START_DASH)));
    }
    entries
}

/// How much wider than Helvetica a viewer's substitute font may set a text: an SVG viewer
/// without Helvetica (or Arial) uses its own sans-serif (DejaVu Sans is about 10 % wider), and
/// not every viewer fits a text to its `textLength`. Legends and the SVG's caution leave this
/// much room, so that nothing runs past the right edge.
pub const SUBSTITUTE_FONT_SLACK: f64 = 1.15;

/// Width of a legend entry's sample.
const SWATCH_WIDTH: f64 = 16.0;

/// Lays the legend out in rows within `width`, returning per entry its (x, row) and the
/// number of rows.
fn legend_rows(entries: &[LegendEntry], width: f64) -> (Vec<(f64, usize)>, usize) {
    let mut places = Vec::new();
    let (mut x, mut row) = (0.0, 0);
    for entry in entries {
        let w = SWATCH_WIDTH
            + 4.0
            + SUBSTITUTE_FONT_SLACK * text::width(&entry.label, Face::Regular, LEGEND_SIZE);
        if x > 0.0 && x + w > width {
            x = 0.0;
            row += 1;
        }
        places.push((x, row));
        x += w + 12.0;
    }
    (places, if entries.is_empty() { 0 } else { row + 1 })
}

/// Height of one legend row.
const LEGEND_ROW: f64 = 11.0;

fn text(at: Pos, s: &str, size: f64, face: Face, anchor: Anchor, color: Rgb) -> Shape {
    Shape::Text { at, text: text::to_winansi(s), size, face, anchor, vertical: false, color }
}

fn line(class: &'static str, runs: Vec<Vec<Pos>>, color: Rgb, width: f64, dash: Option<(f64, f64)>) -> Shape {
    Shape::Line { class, runs, color, width, dash }
}

/// The data ranges of a panel: x over everything placed along it, y over everything drawn.
fn axes(spec: &PlotSpec) -> (Axis, Axis) {
    let mut xs: Vec<f64> = Vec::new();
    let mut ys: Vec<f64> = Vec::new();
    for s in &spec.series {
        xs.extend(&s.xs);
        ys.extend(&s.ys);
    }
    for b in &spec.bands {
        xs.extend(&b.xs);
        ys.extend(b.lo.iter().chain(&b.hi));
    }
    for m in &spec.markers {
        xs.push(m.x);
        ys.push(m.y);
    }
    xs.extend(spec.doses.iter().map(|d| d.x));
    xs.extend(spec.start_x);
    ys.extend(spec.hlines.iter().map(|h| h.y));
    if let Some((lo, hi, _)) = &spec.target {
        ys.extend([*lo, *hi]);
    }
    let finite = |v: &Vec<f64>| v.iter().copied().filter(|x| x.is_finite()).collect::<Vec<f64>>();
    let (xs, ys) = (finite(&xs), finite(&ys));
    let min = |v: &[f64]| v.iter().copied().fold(f64::INFINITY, f64::min);
    let max = |v: &[f64]| v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let x =
        if xs.is_empty() { Axis::linear(0.0, 1.0, false) } else { Axis::linear(min(&xs), max(&xs), false) };
    let y = if spec.log_y {
        let positive: Vec<f64> = ys.iter().copied().filter(|v| *v > 0.0).collect();
        if positive.is_empty() {
            Axis::log(1.0, 10.0, 4)
        } else {
            Axis::log(min(&positive), max(&positive) * 1.02, 4)
        }
    } else if ys.is_empty() {
        Axis::linear(0.0, 1.0, true)
    } else {
        let top = max(&ys);
        Axis::linear(min(&ys).min(0.0), top + 0.02 * top.abs(), true)
    };
    (x, y)
}

/// Lays out a plot panel `width` × `height` points, its axes spanning the data.
pub fn plot_scene(spec: &PlotSpec, width: f64, height: f64) -> Scene {
    let (x_axis, y_axis) = axes(spec);
    panel_scene(spec, x_axis, y_axis, width, height)
}

/// Lays out a plot panel `width` × `height` points on axes the caller chose (a logarithmic x
/// axis, or the same range on both axes of an observed-against-predicted plot).
pub fn panel_scene(spec: &PlotSpec, x_axis: Axis, y_axis: Axis, width: f64, height: f64) -> Scene {
    let entries = legend(spec);
    let y_labels: Vec<&str> = y_axis.ticks.iter().filter_map(|t| t.label.as_deref()).collect();
    let y_label_width = y_labels.iter().map(|l| text::width(l, Face::Regular, TICK_SIZE)).fold(0.0, f64::max);
    let x0 = 14.0 + y_label_width + 6.0;
    let x1 = width - 10.0;
    let (places, rows) = legend_rows(&entries, width - x0);
    let y0 = if spec.title.is_empty() { 8.0 } else { 20.0 };
    let y1 = height - 36.0 - rows as f64 * LEGEND_ROW;
    let frame = Frame { x0, y0, x1, y1 };
    let map = Mapping { x: x_axis, y: y_axis, frame };
    let mut shapes = Vec::new();

    if !spec.title.is_empty() {
        shapes.push(text((0.0, 12.0), &spec.title, TITLE_SIZE, Face::Bold, Anchor::Start, INK));
    }
    // Filled regions first: the target, then the bands. A two-sided target is a stripe; a
    // one-sided one (`trough ≤ 15`) a line at its bound with a narrow shade on the side that
    // meets it, since a stripe down to zero would fill most of a logarithmic panel.
    let mut target_line = None;
    if let Some((lo, hi, _)) = &spec.target {
        let (lo, hi) = (*lo, *hi);
        // The stripe's top and bottom edges in scene coordinates (y grows downwards).
        let (top, bottom) = match (lo > 0.0, hi.is_finite()) {
            (true, true) => (map.map_floor(map.x.lo, hi).1, map.map_floor(map.x.lo, lo).1),
            (false, true) => {
                target_line = Some(hi);
                let y = map.map(map.x.lo, hi).1;
                (y, y + ONE_SIDED_SHADE)
            }
            (true, false) => {
                target_line = Some(lo);
                let y = map.map(map.x.lo, lo).1;
                (y - ONE_SIDED_SHADE, y)
            }
            (false, false) => (f64::NAN, f64::NAN),
        };
        if top.is_finite() && bottom.is_finite() {
            let stripe = clip_polygon(&[(x0, top), (x1, top), (x1, bottom), (x0, bottom)], &frame);
            if stripe.len() >= 3 {
                shapes.push(Shape::Fill { points: stripe, color: TARGET });
            }
        }
    }
    for band in &spec.bands {
        let n = band.xs.len().min(band.lo.len()).min(band.hi.len());
        let mut outline: Vec<Pos> = (0..n).map(|i| map.map_floor(band.xs[i], band.hi[i])).collect();
        outline.extend((0..n).rev().map(|i| map.map_floor(band.xs[i], band.lo[i])));
        let clipped = clip_polygon(&outline, &frame);
        if clipped.len() >= 3 {
            shapes.push(Shape::Fill { points: clipped, color: lighten(band.color, BAND_LIGHTEN) });
        }
    }
    // Grid at the labelled ticks.
    let mut grid = Vec::new();
    for t in map.x.ticks.iter().filter(|t| t.label.is_some()) {
        let (px, _) = map.map(t.value, map.y.lo);
        grid.push(vec![(px, y0), (px, y1)]);
    }
    for t in map.y.ticks.iter().filter(|t| t.label.is_some()) {
        let (_, py) = map.map(map.x.lo, t.value);
        grid.push(vec![(x0, py), (x1, py)]);
    }
    shapes.push(line("grid", grid, GRID, 0.4, None));
    if let Some(y) = target_line {
        let runs = clip_polyline(&[map.map(map.x.lo, y), map.map(map.x.hi, y)], &frame);
        if !runs.is_empty() {
            shapes.push(line("target", runs, TARGET_EDGE, 1.0, None));
        }
    }
    for h in &spec.hlines {
        let runs = clip_polyline(&[map.map(map.x.lo, h.y), map.map(map.x.hi, h.y)], &frame);
        if !runs.is_empty() {
            shapes.push(line("hline", runs, h.color, 0.9, Some(HLINE_DASH)));
        }
    }
    if let Some(sx) = spec.start_x {
        let runs = clip_polyline(&[(map.map(sx, map.y.lo).0, y0), (map.map(sx, map.y.lo).0, y1)], &frame);
        if !runs.is_empty() {
            shapes.push(line("start", runs, MUTED, 0.8, Some(START_DASH)));
        }
    }
    for s in &spec.series {
        let points: Vec<Pos> = s.xs.iter().zip(&s.ys).map(|(x, y)| map.map(*x, *y)).collect();
        let dash = (s.stroke == Stroke::Dashed).then_some(SERIES_DASH);
        shapes.push(line("series", clip_polyline(&points, &frame), s.color, 1.2, dash));
    }
    // The ticks of each colour as one line, in the order the colours first appear.
    let mut colors: Vec<Rgb> = Vec::new();
    for d in &spec.doses {
        if !colors.contains(&d.color) {
            colors.push(d.color);
        }
    }
    for color in colors {
        let ticks: Vec<Vec<Pos>> = spec
            .doses
            .iter()
            .filter(|d| d.color == color)
            .map(|d| map.map(d.x, map.y.lo).0)
            .filter(|px| (x0 - 1e-9..=x1 + 1e-9).contains(px))
            .map(|px| vec![(px, y1), (px, y1 - 6.0)])
            .collect();
        if !ticks.is_empty() {
            shapes.push(line("dose", ticks, color, 1.2, None));
        }
    }
    for m in &spec.markers {
        let center = map.map(m.x, m.y);
        if center.0.is_finite() && center.1.is_finite() && frame.contains(center) {
            shapes.push(Shape::Dot { center, radius: DOT_RADIUS, color: MARKER, hollow: m.hollow });
        }
    }
    // The frame and the axes: ticks outward, labels, axis titles.
    let mut corners = frame.corners();
    corners.push(corners[0]);
    shapes.push(line("frame", vec![corners], INK, 0.7, None));
    let mut ticks = Vec::new();
    for t in &map.x.ticks {
        let (px, _) = map.map(t.value, map.y.lo);
        let len = if t.label.is_some() { 3.5 } else { 2.0 };
        ticks.push(vec![(px, y1), (px, y1 + len)]);
        if let Some(label) = &t.label {
            shapes.push(text((px, y1 + 12.0), label, TICK_SIZE, Face::Regular, Anchor::Middle, INK));
        }
    }
    for t in &map.y.ticks {
        let (_, py) = map.map(map.x.lo, t.value);
        let len = if t.label.is_some() { 3.5 } else { 2.0 };
        ticks.push(vec![(x0 - len, py), (x0, py)]);
        if let Some(label) = &t.label {
            shapes.push(text(
                (x0 - 5.0, py + 0.35 * TICK_SIZE),
                label,
                TICK_SIZE,
                Face::Regular,
                Anchor::End,
                INK,
            ));
        }
    }
    shapes.push(line("tick", ticks, INK, 0.6, None));
    shapes.push(text(
        ((x0 + x1) / 2.0, y1 + 24.0),
        &spec.x_label,
        LABEL_SIZE,
        Face::Regular,
        Anchor::Middle,
        INK,
    ));
    shapes.push(Shape::Text {
        at: (11.0, (y0 + y1) / 2.0),
        text: text::to_winansi(&spec.y_label),
        size: LABEL_SIZE,
        face: Face::Regular,
        anchor: Anchor::Middle,
        vertical: true,
        color: INK,
    });
    // The legend, below the axis title.
    let legend_top = y1 + 32.0;
    for (entry, (lx, row)) in entries.iter().zip(places) {
        let (sx, mid) = (x0 + lx, legend_top + row as f64 * LEGEND_ROW + 4.0);
        match entry.swatch {
            Swatch::Line(color, dash) => {
                shapes.push(line("legend", vec![vec![(sx, mid), (sx + SWATCH_WIDTH, mid)]], color, 1.2, dash))
            }
            Swatch::Fill(color) => shapes.push(Shape::Fill {
                points: vec![
                    (sx, mid - 3.5),
                    (sx + SWATCH_WIDTH, mid - 3.5),
                    (sx + SWATCH_WIDTH, mid + 3.5),
                    (sx, mid + 3.5),
                ],
                color,
            }),
            Swatch::Dot(hollow) => shapes.push(Shape::Dot {
                center: (sx + SWATCH_WIDTH / 2.0, mid),
                radius: DOT_RADIUS,
                color: MARKER,
                hollow,
            }),
            Swatch::Tick(color) => shapes.push(line(
                "legend",
                vec![vec![(sx + SWATCH_WIDTH / 2.0, mid + 3.0), (sx + SWATCH_WIDTH / 2.0, mid - 3.0)]],
                color,
                1.2,
                None,
            )),
        }
        shapes.push(Shape::Text {
            at: (sx + SWATCH_WIDTH + 4.0, mid + 0.35 * LEGEND_SIZE),
            text: entry.label.clone(),
            size: LEGEND_SIZE,
            face: Face::Regular,
            anchor: Anchor::Start,
            vertical: false,
            color: INK,
        });
    }
    Scene { width, height, shapes }
}

impl Shape {
    /// The shape moved by (`dx`, `dy`) points.
    fn shifted(self, dx: f64, dy: f64) -> Shape {
        let at = |(x, y): Pos| (x + dx, y + dy);
        match self {
            Shape::Line { class, runs, color, width, dash } => Shape::Line {
                class,
                runs: runs.into_iter().map(|r| r.into_iter().map(at).collect()).collect(),
                color,
                width,
                dash,
            },
            Shape::Fill { points, color } => {
                Shape::Fill { points: points.into_iter().map(at).collect(), color }
            }
            Shape::Dot { center, radius, color, hollow } => {
                Shape::Dot { center: at(center), radius, color, hollow }
            }
            Shape::Text { at: pos, text, size, face, anchor, vertical, color } => {
                Shape::Text { at: at(pos), text, size, face, anchor, vertical, color }
            }
        }
    }
}

/// Panels side by side in rows of `columns` (small multiples), each in a cell as large as the
/// largest panel, under an optional bold `title`.
pub fn arrange(panels: Vec<Scene>, columns: usize, title: &str) -> Scene {
    let columns = columns.max(1);
    let cell_w = panels.iter().map(|p| p.width).fold(0.0, f64::max);
    let cell_h = panels.iter().map(|p| p.height).fold(0.0, f64::max);
    let top = if title.is_empty() { 0.0 } else { 18.0 };
    let rows = panels.len().div_ceil(columns);
    let mut shapes = Vec::new();
    if !title.is_empty() {
        shapes.push(text((0.0, 12.0), title, TITLE_SIZE, Face::Bold, Anchor::Start, INK));
    }
    for (i, panel) in panels.into_iter().enumerate() {
        let (dx, dy) = ((i % columns) as f64 * cell_w, top + (i / columns) as f64 * cell_h);
        shapes.extend(panel.shapes.into_iter().map(|s| s.shifted(dx, dy)));
    }
    Scene { width: cell_w * columns as f64, height: top + rows as f64 * cell_h, shapes }
}

/// A figure of one or more panels (small multiples), with the file name its SVG is written
/// under. The PDF flows it row by row, so a figure taller than a page continues on the next.
#[derive(Debug, Clone, PartialEq)]
pub struct Figure {
    /// File name of its SVG (`observed-vs-predicted.svg`).
    pub file: &'static str,
    /// Title above the panels (may be empty: a single panel has its own).
    pub title: String,
    /// The panels, in reading order.
    pub panels: Vec<Scene>,
    /// Panels per row.
    pub columns: usize,
}

impl Figure {
    /// The whole figure as one scene (for SVG).
    pub fn scene(&self) -> Scene {
        arrange(self.panels.clone(), self.columns, &self.title)
    }

    /// The figure's rows as scenes, the first with the title (for the PDF's flow).
    pub fn rows(&self) -> Vec<Scene> {
        self.panels
            .chunks(self.columns.max(1))
            .enumerate()
            .map(|(i, row)| arrange(row.to_vec(), self.columns, if i == 0 { &self.title } else { "" }))
            .collect()
    }
}

/// Height of a bar chart with `bars` bars.
#[cfg(feature = "pdf")]
pub fn bars_height(bars: usize) -> f64 {
    20.0 + bars as f64 * 14.0 + 32.0
}

/// Lays out a horizontal bar chart `width` points wide (its height is [`bars_height`]).
#[cfg(feature = "pdf")]
pub fn bars_scene(chart: &super::layout::BarChart, width: f64) -> Scene {
    const BAR_COLOR: Rgb = (0.25, 0.45, 0.70);
    let height = bars_height(chart.labels.len());
    let labels: Vec<String> = chart.labels.iter().map(|l| text::to_winansi(l)).collect();
    let widest = labels.iter().map(|l| text::width(l, Face::Regular, TICK_SIZE)).fold(0.0, f64::max);
    let x0 = 4.0 + widest.min(0.45 * width) + 6.0;
    let x1 = width - 12.0;
    let (y0, y1) = (20.0, height - 32.0);
    let frame = Frame { x0, y0, x1, y1 };
    let map = Mapping { x: Axis::linear(0.0, 100.0, false), y: Axis::linear(0.0, 1.0, false), frame };
    let mut shapes = Vec::new();
    if !chart.title.is_empty() {
        shapes.push(text((0.0, 12.0), &chart.title, TITLE_SIZE, Face::Bold, Anchor::Start, INK));
    }
    let grid: Vec<Vec<Pos>> =
        map.x.ticks.iter().map(|t| map.map(t.value, 0.0).0).map(|px| vec![(px, y0), (px, y1)]).collect();
    shapes.push(line("grid", grid, GRID, 0.4, None));
    for (i, (label, value)) in labels.iter().zip(&chart.values).enumerate() {
        let top = y0 + 3.0 + i as f64 * 14.0;
        let end = map.map(value.clamp(0.0, 100.0), 0.0).0;
        if end > x0 {
            shapes.push(Shape::Fill {
                points: vec![(x0, top), (end, top), (end, top + 9.0), (x0, top + 9.0)],
                color: BAR_COLOR,
            });
        }
        let baseline = top + 4.5 + 0.35 * TICK_SIZE;
        let mut shown = label.clone();
        while text::width(&shown, Face::Regular, TICK_SIZE) > x0 - 10.0 && shown.chars().count() > 1 {
            shown.pop();
            shown.pop();
            shown.push('…');
        }
        shapes.push(Shape::Text {
            at: (x0 - 6.0, baseline),
            text: shown,
            size: TICK_SIZE,
            face: Face::Regular,
            anchor: Anchor::End,
            vertical: false,
            color: INK,
        });
        // The value inside the bar's end when it fits there, else just after it.
        let value_text = if value.is_finite() { format!("{value:.1}") } else { "–".into() };
        let value_w = text::width(&value_text, Face::Bold, TICK_SIZE);
        let (at, anchor, ink) = if end - x0 > value_w + 6.0 {
            ((end - 3.0, baseline), Anchor::End, WHITE)
        } else {
            ((end.max(x0) + 3.0, baseline), Anchor::Start, INK)
        };
        shapes.push(text(at, &value_text, TICK_SIZE, Face::Bold, anchor, ink));
    }
    let mut corners = frame.corners();
    corners.push(corners[0]);
    shapes.push(line("frame", vec![corners], INK, 0.7, None));
    let mut ticks = Vec::new();
    for t in &map.x.ticks {
        let px = map.map(t.value, 0.0).0;
        ticks.push(vec![(px, y1), (px, y1 + 3.5)]);
        if let Some(label) = &t.label {
            shapes.push(text((px, y1 + 12.0), label, TICK_SIZE, Face::Regular, Anchor::Middle, INK));
        }
    }
    shapes.push(line("tick", ticks, INK, 0.6, None));
    shapes.push(text(
        ((x0 + x1) / 2.0, y1 + 24.0),
        &chart.axis_label,
        LABEL_SIZE,
        Face::Regular,
        Anchor::Middle,
        INK,
    ));
    Scene { width, height, shapes }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn values(axis: &Axis, labelled: bool) -> Vec<f64> {
        axis.ticks.iter().filter(|t| t.label.is_some() == labelled).map(|t| t.value).collect()
    }

    fn close(a: &[f64], b: &[f64]) -> bool {
        a.len() == b.len() && a.iter().zip(b).all(|(x, y)| (x - y).abs() <= 1e-9 * y.abs().max(1.0))
    }

    #[test]
    fn linear_ticks_are_nice_multiples() {
        // 0–84 over ~5 intervals: raw step 16.8 → 20 (1-2-5 rule).
        let a = Axis::linear(0.0, 84.0, false);
        assert!(close(&values(&a, true), &[0.0, 20.0, 40.0, 60.0, 80.0]));
        assert!((a.hi - 84.0).abs() < 1e-12);
        // Rounded out: 0.3–37.1 with step 10 becomes 0–40.
        let b = Axis::linear(0.3, 37.1, true);
        assert!((b.lo - 0.0).abs() < 1e-12 && (b.hi - 40.0).abs() < 1e-12);
        let labels: Vec<&str> = b.ticks.iter().filter_map(|t| t.label.as_deref()).collect();
        assert_eq!(labels, ["0", "10", "20", "30", "40"]);
        // Fractional steps get the decimals they need, and no "-0".
        let c = Axis::linear(-0.5, 0.5, false);
        let labels: Vec<&str> = c.ticks.iter().filter_map(|t| t.label.as_deref()).collect();
        assert_eq!(labels, ["-0.4", "-0.2", "0.0", "0.2", "0.4"]);
        // A flat range still gives a usable axis.
        let d = Axis::linear(3.0, 3.0, true);
        assert!(d.lo < 3.0 && d.hi > 3.0);
    }

    #[test]
    fn log_ticks_cover_decades_and_clip_below() {
        let a = Axis::log(0.3, 42.0, 4);
        assert!((a.lo - 0.1).abs() < 1e-12 && (a.hi - 100.0).abs() < 1e-9);
        assert!(close(&values(&a, true), &[0.1, 1.0, 10.0, 100.0]));
        // Minor ticks at 2..9 per decade.
        assert_eq!(values(&a, false).len(), 3 * 8);
        // No more than 4 decades below the top.
        let b = Axis::log(1e-9, 20.0, 4);
        assert!((b.lo - 0.01).abs() < 1e-15);
        // Within two decades 2 and 5 are labelled too.
        let c = Axis::log(2.5, 8.0, 4);
        assert!(close(&values(&c, true), &[1.0, 2.0, 5.0, 10.0]));
        assert!(c.fraction(0.0).is_nan() && c.fraction(-1.0).is_nan());
        assert!((c.fraction(10f64.sqrt()) - 0.5).abs() < 1e-12);
    }

    #[test]
    fn clipping_cuts_at_the_frame() {
        let f = Frame { x0: 0.0, y0: 0.0, x1: 10.0, y1: 10.0 };
        // A line crossing the frame from outside to outside.
        let runs = clip_polyline(&[(-5.0, 5.0), (15.0, 5.0)], &f);
        assert_eq!(runs.len(), 1);
        assert!(close(&[runs[0][0].0, runs[0][1].0], &[0.0, 10.0]));
        // A NaN point splits a line into two runs.
        let runs = clip_polyline(&[(1.0, 1.0), (2.0, 2.0), (f64::NAN, 3.0), (4.0, 4.0), (5.0, 5.0)], &f);
        assert_eq!(runs.len(), 2);
        // Entirely outside: nothing.
        assert!(clip_polyline(&[(20.0, 20.0), (30.0, 30.0)], &f).is_empty());
        // A square straddling the right edge is cut to the part inside: area 5 × 10 = 50.
        let poly = clip_polygon(&[(5.0, 0.0), (15.0, 0.0), (15.0, 10.0), (5.0, 10.0)], &f);
        let area =
            poly.iter().zip(poly.iter().cycle().skip(1)).map(|(a, b)| a.0 * b.1 - b.0 * a.1).sum::<f64>()
                / 2.0;
        assert!((area.abs() - 50.0).abs() < 1e-9, "area {area}");
    }
}
