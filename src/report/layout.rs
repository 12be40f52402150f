//! The report as a sequence of content blocks, independent of how it is drawn. The content is
//! built from an analysis (`content`), then drawn as PDF pages (`pdf`) or, for plots, as SVG
//! (`svg`).

/// An RGB colour, components 0–1.
pub type Rgb = (f32, f32, f32);

/// A whole report.
#[derive(Debug, Clone, PartialEq)]
pub struct Document {
    /// Title on the first page and in the PDF metadata.
    pub title: String,
    /// The caution shown in a banner at the top of every page.
    pub caution: String,
    /// Left part of every footer (tool version and creation time); the page number is added.
    pub footer: String,
    /// Creation time as ISO 8601 (UTC), for the PDF metadata.
    pub created_iso: String,
    /// Who prepared the report (the case's author), for the PDF metadata.
    pub author: Option<String>,
    /// The content, in reading order.
    pub blocks: Vec<Block>,
}

/// One piece of content.
#[derive(Debug, Clone, PartialEq)]
pub enum Block {
    /// A section heading.
    Heading(String),
    /// A paragraph, wrapped to the page width.
    Paragraph(String),
    /// A smaller paragraph (warnings, notes, references).
    Note(String),
    /// Label–value lines.
    KeyValues(Vec<(String, String)>),
    /// A table; rows never split across pages and the header repeats on a new page.
    Table(Table),
    /// A plot panel.
    Plot(PlotSpec),
    /// A horizontal bar chart (e.g. probability of target attainment by regimen).
    Bars(BarChart),
    /// A laid-out figure of one or more panels (the diagnostic plots).
    Figure(super::plot::Figure),
    /// Start a new page.
    PageBreak,
}

/// A table.
#[derive(Debug, Clone, PartialEq)]
pub struct Table {
    /// Column headers.
    pub headers: Vec<String>,
    /// Rows of cells (already formatted).
    pub rows: Vec<Vec<String>>,
    /// Right-align a column (numbers), per column.
    pub right: Vec<bool>,
}

/// Line style of a series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stroke {
    /// A solid line.
    Solid,
    /// A dashed line.
    Dashed,
}

/// A line through points.
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    /// Legend label.
    pub label: String,
    /// x values (ascending).
    pub xs: Vec<f64>,
    /// y values.
    pub ys: Vec<f64>,
    /// Line style.
    pub stroke: Stroke,
    /// Colour.
    pub color: Rgb,
}

/// A shaded band between two curves.
#[derive(Debug, Clone, PartialEq)]
pub struct Band {
    /// Legend label.
    pub label: String,
    /// x values (ascending).
    pub xs: Vec<f64>,
    /// Lower edge.
    pub lo: Vec<f64>,
    /// Upper edge.
    pub hi: Vec<f64>,
    /// Fill colour (drawn light).
    pub color: Rgb,
}

/// A horizontal reference line (e.g. the LLOQ).
#[derive(Debug, Clone, PartialEq)]
pub struct HLine {
    /// Legend label.
    pub label: String,
    /// y value.
    pub y: f64,
    /// Colour.
    pub color: Rgb,
}

/// An observed point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Marker {
    /// x value.
    pub x: f64,
    /// y value (for a below-limit level: the limit).
    pub y: f64,
    /// Drawn hollow (a level below the quantification limit).
    pub hollow: bool,
}

/// A dose marked on a plot's time axis.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DoseTick {
    /// Time (the x value).
    pub x: f64,
    /// Colour: that of the curve the dose belongs to.
    pub color: Rgb,
}

/// One plot panel.
#[derive(Debug, Clone, PartialEq)]
pub struct PlotSpec {
    /// Panel title.
    pub title: String,
    /// x-axis label with unit.
    pub x_label: String,
    /// y-axis label with unit.
    pub y_label: String,
    /// Logarithmic y axis.
    pub log_y: bool,
    /// Shaded bands (drawn first).
    pub bands: Vec<Band>,
    /// A horizontal target band (lo, hi, label), drawn as a light stripe.
    pub target: Option<(f64, f64, String)>,
    /// Lines.
    pub series: Vec<Series>,
    /// Horizontal reference lines.
    pub hlines: Vec<HLine>,
    /// Observed levels.
    pub markers: Vec<Marker>,
    /// Legend label of the observed levels.
    pub markers_label: String,
    /// Doses: small ticks along the bottom, each in the colour of the curve it belongs to.
    pub doses: Vec<DoseTick>,
    /// A vertical line marking where the proposed regimen starts, if any.
    pub start_x: Option<f64>,
}

impl PlotSpec {
    /// A panel with its title and axis labels and nothing drawn in it yet.
    pub fn empty(
        title: impl Into<String>,
        x_label: impl Into<String>,
        y_label: impl Into<String>,
    ) -> PlotSpec {
        PlotSpec {
            title: title.into(),
            x_label: x_label.into(),
            y_label: y_label.into(),
            log_y: false,
            bands: Vec::new(),
            target: None,
            series: Vec::new(),
            hlines: Vec::new(),
            markers: Vec::new(),
            markers_label: String::new(),
            doses: Vec::new(),
            start_x: None,
        }
    }
}

/// A horizontal bar chart of percentages (0–100), as the report's tables print them.
#[derive(Debug, Clone, PartialEq)]
pub struct BarChart {
    /// Chart title.
    pub title: String,
    /// One label per bar.
    pub labels: Vec<String>,
    /// One value per bar, in percent (0–100).
    pub values: Vec<f64>,
    /// Axis label with its unit (e.g. "probability of target attainment (%)").
    pub axis_label: String,
}
