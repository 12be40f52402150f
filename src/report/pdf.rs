//! Draws a [`Document`] as A4 PDF pages with printpdf's builtin Helvetica fonts.
//!
//! Every page carries the caution banner at the top and a footer with the page number. Blocks
//! flow down the page; a table row, a label–value pair, a plot and a bar chart are never split
//! across pages, a table's header repeats on each page it continues on, and a heading is not
//! left alone at the bottom of a page. Plots are vector graphics laid out by the plot geometry the SVG backend shares.
//!
//! The output is deterministic: the document ID is a digest of the content and the dates come
//! from [`Document::created_iso`].

use super::layout::{Block, Document, Rgb, Table};
use super::plot::{self, Anchor, Scene, Shape, WHITE};
use super::text::{self, Face};
use printpdf::{
    BuiltinFont, Color, Line, LineDashPattern, LineJoinStyle, LinePoint, Mm, Op, PaintMode, PdfDocument,
    PdfFontHandle, PdfPage, PdfParseErrorSeverity, PdfSaveOptions, Point, Polygon, PolygonRing, Pt, TextItem,
    TextMatrix, WindingOrder,
};
use rayon::prelude::*;
use sha2::{Digest, Sha256};
use std::fmt::Write as _;

/// A4 in points (210 × 297 mm).
const PAGE_W: f64 = 595.276;
const PAGE_H: f64 = 841.89;
const MARGIN: f64 = 50.0;
const CONTENT_W: f64 = PAGE_W - 2.0 * MARGIN;
/// The banner's top edge and inner padding.
const BANNER_TOP: f64 = 28.0;
const BANNER_PAD: f64 = 7.0;
const BANNER_SIZE: f64 = 8.5;
const BANNER_LABEL: &str = "CAUTION";
const BANNER_LABEL_SIZE: f64 = 11.0;
/// The footer rule and the lowest point the body may reach.
const FOOTER_RULE: f64 = PAGE_H - 40.0;
const FOOTER_SIZE: f64 = 7.5;
const BODY_BOTTOM: f64 = FOOTER_RULE - 12.0;

const TITLE_SIZE: f64 = 16.0;
const HEADING_SIZE: f64 = 12.0;
const BODY_SIZE: f64 = 9.5;
const NOTE_SIZE: f64 = 8.0;
const KV_SIZE: f64 = 9.0;
/// Table font sizes tried in turn until the table fits the page width; at the smallest,
/// cells wrap instead.
const TABLE_SIZES: [f64; 4] = [8.5, 8.0, 7.5, 7.0];
const CELL_PAD_X: f64 = 4.0;
const CELL_PAD_Y: f64 = 2.5;
/// A narrow table is widened to the page, but by no more than this factor.
const TABLE_STRETCH: f64 = 1.5;
const PLOT_H: f64 = 270.0;

const INK: Rgb = (0.1, 0.1, 0.1);
const GREY: Rgb = (0.33, 0.33, 0.33);
const RULE: Rgb = (0.6, 0.6, 0.6);
const HEADER_FILL: Rgb = (0.89, 0.90, 0.92);
const ZEBRA_FILL: Rgb = (0.965, 0.965, 0.97);
const BANNER_FILL: Rgb = (1.0, 0.93, 0.88);
const BANNER_EDGE: Rgb = (0.72, 0.16, 0.08);
const BANNER_INK: Rgb = (0.50, 0.05, 0.03);

/// Renders the document as PDF bytes.
pub fn render_pdf(doc: &Document) -> Result<Vec<u8>, String> {
    validate(doc)?;
    let created = pdf_date(&doc.created_iso)?;
    let draw = || {
        let mut flow = Flow::new(&doc.caution);
        flow.title(&doc.title);
        for (i, block) in doc.blocks.iter().enumerate() {
            match block {
                Block::Heading(s) => flow.heading(s, doc.blocks.get(i + 1)),
                Block::Paragraph(s) => flow.paragraph(s, BODY_SIZE, INK, 6.0),
                Block::Note(s) => flow.paragraph(s, NOTE_SIZE, GREY, 5.0),
                Block::KeyValues(pairs) => flow.key_values(pairs),
                // The notes under a table (its footnotes) start on the page of its last row.
                Block::Table(table) => flow.table(table, doc.blocks.get(i + 1).map_or(0.0, footnote_height)),
                Block::Plot(spec) => flow.scene(&plot::plot_scene(spec, CONTENT_W, PLOT_H)),
                Block::Bars(chart) => flow.scene(&plot::bars_scene(chart, CONTENT_W)),
                Block::Figure(figure) => figure.rows().iter().for_each(|row| flow.scene(row)),
                Block::PageBreak => {
                    // A break before nothing would leave an empty page.
                    if i + 1 < doc.blocks.len() {
                        flow.page_break()
                    }
                }
            }
        }
        let pages = flow.finish(&doc.footer);

        let mut pdf = PdfDocument::new(&doc.title);
        let info = &mut pdf.metadata.info;
        info.creation_date = created;
        info.modification_date = created;
        info.metadata_date = created;
        info.creator = "cistern".into();
        info.author = doc.author.clone().unwrap_or_default();
        pdf.with_pages(pages.into_iter().map(|ops| PdfPage::new(Mm(210.0), Mm(297.0), ops)).collect());

        let mut warnings = Vec::new();
        let lo = pdf.to_lopdf_document(&PdfSaveOptions::default(), &mut warnings);
        let errors: Vec<String> = warnings
            .iter()
            .filter(|w| w.severity == PdfParseErrorSeverity::Error)
            .map(|w| format!("page {}: {}", w.page + 1, w.msg))
            .collect();
        if !errors.is_empty() {
            return Err(format!("the PDF writer reported: {}", errors.join("; ")));
        }
        Ok(lo)
    };
    // The file identifier is digested while the pages are drawn.
    let (lo, digest) = rayon::join(draw, || identifier(doc));
    let (mut lo, digest) = (lo?, digest?);
    let id =
        lo.trailer.get_mut(b"ID").and_then(|o| o.as_array_mut()).map_err(|e| format!("PDF trailer: {e}"))?;
    for part in id.iter_mut() {
        *part.as_str_mut().map_err(|e| format!("PDF trailer: {e}"))? = digest.clone().into_bytes();
    }
    // printpdf writes an empty PDF/X version key, which readers take as a PDF/X claim.
    if let Ok(info) = lo.trailer.get(b"Info").and_then(|o| o.as_reference())
        && let Ok(dict) = lo.get_object_mut(info).and_then(|o| o.as_dict_mut())
    {
        dict.remove(b"GTS_PDFXVersion");
    }
    // Each stream compressed on its own, as `lopdf::Document::compress` does them in turn (which
    // also ignores a stream that fails).
    let streams: Vec<_> = lo
        .objects
        .values_mut()
        .filter_map(|o| o.as_stream_mut().ok())
        .filter(|s| s.allows_compression)
        .collect();
    streams.into_par_iter().for_each(|s| {
        let _ = s.compress();
    });
    let mut bytes = Vec::new();
    lo.save_to(&mut bytes).map_err(|e| format!("cannot write the PDF: {e}"))?;
    Ok(bytes)
}

/// The file identifier: printpdf fills it from a process-wide counter; a digest of the
/// content (its `Debug` text, hashed as it is written) makes the same document give the same
/// bytes.
fn identifier(doc: &Document) -> Result<String, String> {
    struct Hashing(Sha256);
    impl std::fmt::Write for Hashing {
        fn write_str(&mut self, s: &str) -> std::fmt::Result {
            self.0.update(s.as_bytes());
            Ok(())
        }
    }
    let mut hashing = Hashing(Sha256::new());
    write!(hashing, "{doc:?}").map_err(|e| format!("cannot digest the document: {e}"))?;
    Ok(hashing.0.finalize().iter().take(16).map(|b| format!("{b:02X}")).collect())
}

/// Rejects content the layout cannot draw faithfully.
fn validate(doc: &Document) -> Result<(), String> {
    for block in &doc.blocks {
        match block {
            Block::Table(t) => {
                if let Some((i, row)) = t.rows.iter().enumerate().find(|(_, r)| r.len() != t.headers.len()) {
                    return Err(format!(
                        "table with columns {:?}: row {} has {} cells, not {}",
                        t.headers,
                        i + 1,
                        row.len(),
                        t.headers.len()
                    ));
                }
            }
            Block::Plot(p) => {
                for s in &p.series {
                    if s.xs.len() != s.ys.len() {
                        return Err(format!(
                            "plot {:?}: series {:?} has {} x and {} y values",
                            p.title,
                            s.label,
                            s.xs.len(),
                            s.ys.len()
                        ));
                    }
                }
                for b in &p.bands {
                    if b.xs.len() != b.lo.len() || b.xs.len() != b.hi.len() {
                        return Err(format!(
                            "plot {:?}: band {:?} has edges of unequal length",
                            p.title, b.label
                        ));
                    }
                }
            }
            Block::Bars(c) if c.labels.len() != c.values.len() => {
                return Err(format!(
                    "bar chart {:?}: {} labels but {} values",
                    c.title,
                    c.labels.len(),
                    c.values.len()
                ));
            }
            _ => {}
        }
    }
    Ok(())
}

/// The PDF date of an ISO 8601 UTC time (`2025-03-01T14:05:09Z`, fractional seconds and a
/// `+00:00` offset accepted).
fn pdf_date(iso: &str) -> Result<printpdf::OffsetDateTime, String> {
    let bad = || format!("creation time {iso:?} is not an ISO 8601 UTC time like 2025-03-01T14:05:09Z");
    let b = iso.as_bytes();
    if b.len() < 19
        || b[4] != b'-'
        || b[7] != b'-'
        || !matches!(b[10], b'T' | b' ')
        || b[13] != b':'
        || b[16] != b':'
    {
        return Err(bad());
    }
    let mut rest = &iso[19..];
    if let Some(frac) = rest.strip_prefix('.') {
        let digits = frac.chars().take_while(char::is_ascii_digit).count();
        if digits == 0 {
            return Err(bad());
        }
        rest = &frac[digits..];
    }
    if !matches!(rest, "" | "Z" | "+00:00" | "+0000") {
        return Err(bad());
    }
    let digits: String = iso[..19].chars().filter(char::is_ascii_digit).collect();
    if digits.len() != 14 {
        return Err(bad());
    }
    printpdf::parse_pdf_date(&format!("D:{digits}")).map_err(|e| format!("{}: {e}", bad()))
}

fn color((r, g, b): Rgb) -> Color {
    Color::Rgb(printpdf::Rgb::new(r, g, b, None))
}

fn font(face: Face) -> PdfFontHandle {
    PdfFontHandle::Builtin(match face {
        Face::Regular => BuiltinFont::Helvetica,
        Face::Bold => BuiltinFont::HelveticaBold,
    })
}

/// A page position from the top-left corner in points, as a PDF point.
fn point(x: f64, y: f64) -> Point {
    Point { x: Pt(x as f32), y: Pt((PAGE_H - y) as f32) }
}

fn line_points(points: &[(f64, f64)]) -> Vec<LinePoint> {
    points.iter().map(|&(x, y)| LinePoint { p: point(x, y), bezier: false }).collect()
}

/// Face, size in points and colour of a piece of text.
#[derive(Debug, Clone, Copy)]
struct Style(Face, f64, Rgb);

/// One line of already-mapped text with its baseline at (`x`, `y`) from the page's top-left,
/// in its own text section so that no position carries over from an earlier label.
fn put_text(ops: &mut Vec<Op>, (x, y): (f64, f64), s: &str, style: Style, vertical: bool) {
    if s.is_empty() {
        return;
    }
    let Style(face, size, rgb) = style;
    let (px, py) = (x as f32, (PAGE_H - y) as f32);
    let matrix = if vertical {
        TextMatrix::Raw([0.0, 1.0, -1.0, 0.0, px, py])
    } else {
        TextMatrix::Translate(Pt(px), Pt(py))
    };
    ops.extend([
        Op::StartTextSection,
        Op::SetFont { font: font(face), size: Pt(size as f32) },
        Op::SetFillColor { col: color(rgb) },
        Op::SetTextMatrix { matrix },
        Op::ShowText { items: vec![TextItem::Text(s.to_string())] },
        Op::EndTextSection,
    ]);
}

fn fill_polygon(ops: &mut Vec<Op>, points: &[(f64, f64)], rgb: Rgb) {
    ops.push(Op::SetFillColor { col: color(rgb) });
    ops.push(Op::DrawPolygon {
        polygon: Polygon {
            rings: vec![PolygonRing { points: line_points(points) }],
            mode: PaintMode::Fill,
            winding_order: WindingOrder::NonZero,
        },
    });
}

fn fill_rect(ops: &mut Vec<Op>, x: f64, y: f64, w: f64, h: f64, rgb: Rgb) {
    fill_polygon(ops, &[(x, y), (x + w, y), (x + w, y + h), (x, y + h)], rgb);
}

fn stroke(ops: &mut Vec<Op>, runs: &[Vec<(f64, f64)>], rgb: Rgb, width: f64, dash: Option<(f64, f64)>) {
    ops.push(Op::SetOutlineColor { col: color(rgb) });
    ops.push(Op::SetOutlineThickness { pt: Pt(width as f32) });
    if let Some((on, off)) = dash {
        ops.push(Op::SetLineDashPattern { dash: LineDashPattern::new(0.0, &[on as f32, off as f32]) });
    }
    for run in runs {
        ops.push(Op::DrawLine { line: Line { points: line_points(run), is_closed: false } });
    }
    if dash.is_some() {
        ops.push(Op::SetLineDashPattern { dash: LineDashPattern::solid() });
    }
}

/// A circle as four cubic Béziers (control distance 0.5523 r, the usual quarter-circle
/// approximation; common practice, no source).
fn circle(ops: &mut Vec<Op>, (cx, cy): (f64, f64), r: f64, rgb: Rgb, hollow: bool) {
    let k = 0.5523 * r;
    let pts = [
        ((cx + r, cy), false),
        ((cx + r, cy + k), true),
        ((cx + k, cy + r), true),
        ((cx, cy + r), false),
        ((cx - k, cy + r), true),
        ((cx - r, cy + k), true),
        ((cx - r, cy), false),
        ((cx - r, cy - k), true),
        ((cx - k, cy - r), true),
        ((cx, cy - r), false),
        ((cx + k, cy - r), true),
        ((cx + r, cy - k), true),
        ((cx + r, cy), false),
    ];
    let points = pts.iter().map(|&((x, y), bezier)| LinePoint { p: point(x, y), bezier }).collect();
    if hollow {
        ops.push(Op::SetFillColor { col: color(WHITE) });
        ops.push(Op::SetOutlineColor { col: color(rgb) });
        ops.push(Op::SetOutlineThickness { pt: Pt(1.0) });
    } else {
        ops.push(Op::SetFillColor { col: color(rgb) });
    }
    ops.push(Op::DrawPolygon {
        polygon: Polygon {
            rings: vec![PolygonRing { points }],
            mode: if hollow { PaintMode::FillStroke } else { PaintMode::Fill },
            winding_order: WindingOrder::NonZero,
        },
    });
}

/// Draws a scene with its top-left corner at (`left`, `top`).
fn draw_scene(ops: &mut Vec<Op>, scene: &Scene, left: f64, top: f64) {
    let at = |(x, y): (f64, f64)| (left + x, top + y);
    for shape in &scene.shapes {
        match shape {
            Shape::Line { runs, color, width, dash, .. } => {
                let runs: Vec<Vec<(f64, f64)>> =
                    runs.iter().map(|r| r.iter().map(|&p| at(p)).collect()).collect();
                stroke(ops, &runs, *color, *width, *dash);
            }
            Shape::Fill { points, color } => {
                fill_polygon(ops, &points.iter().map(|&p| at(p)).collect::<Vec<_>>(), *color)
            }
            Shape::Dot { center, radius, color, hollow } => {
                circle(ops, at(*center), *radius, *color, *hollow)
            }
            Shape::Text { at: pos, text: s, size, face, anchor, vertical, color } => {
                let w = text::width(s, *face, *size);
                let shift = match anchor {
                    Anchor::Start => 0.0,
                    Anchor::Middle => w / 2.0,
                    Anchor::End => w,
                };
                let (x, y) = at(*pos);
                if *vertical {
                    put_text(ops, (x, y + shift), s, Style(*face, *size, *color), true);
                } else {
                    put_text(ops, (x - shift, y), s, Style(*face, *size, *color), false);
                }
            }
        }
    }
}

/// Column widths for a table at font `size`: the natural widths when they fit (widened
/// towards the page width), else a share of the page width in which narrow columns keep
/// their natural width and wide ones split the rest in proportion. The flag says whether the
/// natural widths fit.
fn column_widths(table: &Table, size: f64) -> (Vec<f64>, bool) {
    let natural: Vec<f64> = (0..table.headers.len())
        .map(|c| {
            let header = text::width(&text::to_winansi(&table.headers[c]), Face::Bold, size);
            let cells = table.rows.iter().map(|r| text::width(&text::to_winansi(&r[c]), Face::Regular, size));
            cells.fold(header, f64::max) + 2.0 * CELL_PAD_X
        })
        .collect();
    let total: f64 = natural.iter().sum();
    if total <= CONTENT_W {
        let scale = (CONTENT_W / total).min(TABLE_STRETCH);
        return (natural.iter().map(|w| w * scale).collect(), true);
    }
    let mut widths = vec![0.0; natural.len()];
    let mut open: Vec<usize> = (0..natural.len()).collect();
    let mut room = CONTENT_W;
    loop {
        let fair = room / open.len() as f64;
        let (narrow, wide): (Vec<usize>, Vec<usize>) = open.iter().partition(|&&c| natural[c] <= fair);
        if narrow.is_empty() {
            let wide_total: f64 = wide.iter().map(|&c| natural[c]).sum();
            for &c in &wide {
                widths[c] = room * natural[c] / wide_total;
            }
            return (widths, false);
        }
        for &c in &narrow {
            widths[c] = natural[c];
            room -= natural[c];
        }
        open = wide;
        if open.is_empty() {
            return (widths, false);
        }
    }
}

/// A table laid out: font size, column widths and every row's wrapped cells.
struct TableLayout {
    size: f64,
    widths: Vec<f64>,
    header: Vec<Vec<String>>,
    rows: Vec<Vec<Vec<String>>>,
}

impl TableLayout {
    fn new(table: &Table) -> TableLayout {
        let (size, widths) = TABLE_SIZES
            .iter()
            .map(|&s| (s, column_widths(table, s)))
            .find(|(_, (_, fits))| *fits)
            .map(|(s, (w, _))| (s, w))
            .unwrap_or_else(|| {
                let s = TABLE_SIZES[TABLE_SIZES.len() - 1];
                (s, column_widths(table, s).0)
            });
        let wrap_row = |cells: &[String], face| {
            cells
                .iter()
                .zip(&widths)
                .map(|(c, w)| text::wrap(&text::to_winansi(c), face, size, w - 2.0 * CELL_PAD_X))
                .collect::<Vec<_>>()
        };
        let header = wrap_row(&table.headers, Face::Bold);
        let rows = table.rows.iter().map(|r| wrap_row(r, Face::Regular)).collect();
        TableLayout { size, widths, header, rows }
    }

    fn leading(&self) -> f64 {
        self.size * 1.25
    }

    fn height(&self, cells: &[Vec<String>]) -> f64 {
        let lines = cells.iter().map(Vec::len).max().unwrap_or(1);
        lines as f64 * self.leading() + 2.0 * CELL_PAD_Y
    }

    /// Draws one row with its top at `y`.
    fn draw_row(
        &self,
        ops: &mut Vec<Op>,
        y: f64,
        cells: &[Vec<String>],
        right: &[bool],
        face: Face,
        fill: Option<Rgb>,
    ) {
        let h = self.height(cells);
        let total: f64 = self.widths.iter().sum();
        if let Some(rgb) = fill {
            fill_rect(ops, MARGIN, y, total, h, rgb);
        }
        let mut x = MARGIN;
        for (c, lines) in cells.iter().enumerate() {
            let w = self.widths[c];
            for (k, line) in lines.iter().enumerate() {
                let baseline = y + CELL_PAD_Y + k as f64 * self.leading() + self.size * 0.95;
                let lx = if right.get(c).copied().unwrap_or(false) {
                    x + w - CELL_PAD_X - text::width(line, face, self.size)
                } else {
                    x + CELL_PAD_X
                };
                put_text(ops, (lx, baseline), line, Style(face, self.size, INK), false);
            }
            x += w;
        }
    }
}

/// Height of the part of a block that must follow its heading on the same page: the whole
/// of an unsplittable block, else its first line, row or pair (with the table's header).
fn lead_height(block: &Block) -> f64 {
    let first_lines = |s: &str, size: f64| {
        let lines = text::wrap(&text::to_winansi(s), Face::Regular, size, CONTENT_W).len().min(2);
        lines as f64 * size * 1.35
    };
    match block {
        Block::Heading(s) => first_lines(s, HEADING_SIZE),
        Block::Paragraph(s) => first_lines(s, BODY_SIZE),
        Block::Note(s) => first_lines(s, NOTE_SIZE),
        Block::KeyValues(pairs) => {
            if pairs.is_empty() {
                0.0
            } else {
                KV_SIZE * 1.35
            }
        }
        Block::Table(t) => {
            let layout = TableLayout::new(t);
            layout.height(&layout.header) + layout.rows.first().map_or(0.0, |r| layout.height(r))
        }
        Block::Plot(_) => PLOT_H,
        Block::Bars(chart) => plot::bars_height(chart.labels.len()),
        Block::Figure(figure) => figure.rows().first().map_or(0.0, |row| row.height),
        Block::PageBreak => 0.0,
    }
}

/// Height of the start of a footnote: the first lines of a note (nothing for other blocks).
fn footnote_height(block: &Block) -> f64 {
    match block {
        Block::Note(_) => lead_height(block),
        _ => 0.0,
    }
}

/// Places blocks down the pages.
struct Flow {
    pages: Vec<Vec<Op>>,
    /// Current position from the page top, in points.
    y: f64,
    /// The caution, wrapped for the banner.
    caution: Vec<String>,
    /// Where the body starts below the banner.
    body_top: f64,
}

impl Flow {
    fn new(caution: &str) -> Flow {
        let label_w = text::width(BANNER_LABEL, Face::Bold, BANNER_LABEL_SIZE);
        let text_w = CONTENT_W - 2.0 * BANNER_PAD - label_w - 10.0;
        let caution = text::wrap(&text::to_winansi(caution), Face::Bold, BANNER_SIZE, text_w);
        let banner_h = Self::banner_height(caution.len());
        let body_top = BANNER_TOP + banner_h + 16.0;
        let mut flow = Flow { pages: Vec::new(), y: body_top, caution, body_top };
        flow.new_page();
        flow
    }

    fn banner_height(lines: usize) -> f64 {
        (lines as f64 * BANNER_SIZE * 1.3).max(BANNER_LABEL_SIZE * 1.3) + 2.0 * BANNER_PAD
    }

    fn ops(&mut self) -> &mut Vec<Op> {
        self.pages.last_mut().expect("a page is always open")
    }

    fn at_top(&self) -> bool {
        (self.y - self.body_top).abs() < 1e-9
    }

    fn new_page(&mut self) {
        let mut ops = vec![Op::SetLineJoinStyle { join: LineJoinStyle::Round }];
        let h = Self::banner_height(self.caution.len());
        ops.push(Op::SetOutlineColor { col: color(BANNER_EDGE) });
        ops.push(Op::SetOutlineThickness { pt: Pt(1.2) });
        ops.push(Op::SetFillColor { col: color(BANNER_FILL) });
        let corners = [
            (MARGIN, BANNER_TOP),
            (PAGE_W - MARGIN, BANNER_TOP),
            (PAGE_W - MARGIN, BANNER_TOP + h),
            (MARGIN, BANNER_TOP + h),
        ];
        ops.push(Op::DrawPolygon {
            polygon: Polygon {
                rings: vec![PolygonRing { points: line_points(&corners) }],
                mode: PaintMode::FillStroke,
                winding_order: WindingOrder::NonZero,
            },
        });
        let label_w = text::width(BANNER_LABEL, Face::Bold, BANNER_LABEL_SIZE);
        let text_block = self.caution.len() as f64 * BANNER_SIZE * 1.3;
        let label_base = BANNER_TOP + h / 2.0 + BANNER_LABEL_SIZE * text::CAP_HEIGHT / 2.0;
        put_text(
            &mut ops,
            (MARGIN + BANNER_PAD, label_base),
            BANNER_LABEL,
            Style(Face::Bold, BANNER_LABEL_SIZE, BANNER_EDGE),
            false,
        );
        let first = BANNER_TOP + (h - text_block) / 2.0 + BANNER_SIZE;
        for (i, line) in self.caution.iter().enumerate() {
            let x = MARGIN + BANNER_PAD + label_w + 10.0;
            put_text(
                &mut ops,
                (x, first + i as f64 * BANNER_SIZE * 1.3),
                line,
                Style(Face::Bold, BANNER_SIZE, BANNER_INK),
                false,
            );
        }
        self.pages.push(ops);
        self.y = self.body_top;
    }

    /// Starts a new page unless `h` more points fit on this one (or this page is still empty,
    /// where nothing would be gained).
    fn ensure(&mut self, h: f64) {
        if self.y + h > BODY_BOTTOM && !self.at_top() {
            self.new_page();
        }
    }

    fn page_break(&mut self) {
        if !self.at_top() {
            self.new_page();
        }
    }

    fn title(&mut self, title: &str) {
        if title.is_empty() {
            return;
        }
        for line in text::wrap(&text::to_winansi(title), Face::Bold, TITLE_SIZE, CONTENT_W) {
            let y = self.y + TITLE_SIZE;
            put_text(self.ops(), (MARGIN, y), &line, Style(Face::Bold, TITLE_SIZE, INK), false);
            self.y += TITLE_SIZE * 1.25;
        }
        self.y += 8.0;
    }

    /// A heading, moved to the next page with what follows it if that would not fit here.
    fn heading(&mut self, s: &str, next: Option<&Block>) {
        let lines = text::wrap(&text::to_winansi(s), Face::Bold, HEADING_SIZE, CONTENT_W);
        let h = lines.len() as f64 * HEADING_SIZE * 1.25;
        let space = if self.at_top() { 0.0 } else { 8.0 };
        self.ensure(space + h + 4.0 + next.map_or(0.0, lead_height));
        if !self.at_top() {
            self.y += space;
        }
        for line in lines {
            let y = self.y + HEADING_SIZE;
            put_text(self.ops(), (MARGIN, y), &line, Style(Face::Bold, HEADING_SIZE, INK), false);
            self.y += HEADING_SIZE * 1.25;
        }
        self.y += 4.0;
    }

    /// A wrapped paragraph; it may continue on the next page between lines.
    fn paragraph(&mut self, s: &str, size: f64, rgb: Rgb, after: f64) {
        let leading = size * 1.35;
        for line in text::wrap(&text::to_winansi(s), Face::Regular, size, CONTENT_W) {
            self.ensure(leading);
            let y = self.y + size;
            put_text(self.ops(), (MARGIN, y), &line, Style(Face::Regular, size, rgb), false);
            self.y += leading;
        }
        self.y += after;
    }

    fn key_values(&mut self, pairs: &[(String, String)]) {
        let labels: Vec<String> = pairs.iter().map(|(k, _)| text::to_winansi(k)).collect();
        let widest = labels.iter().map(|l| text::width(l, Face::Bold, KV_SIZE)).fold(0.0, f64::max);
        let label_w = (widest + 12.0).min(0.4 * CONTENT_W);
        let leading = KV_SIZE * 1.35;
        for (label, (_, value)) in labels.iter().zip(pairs) {
            let label_lines = text::wrap(label, Face::Bold, KV_SIZE, label_w - 12.0);
            let value_lines =
                text::wrap(&text::to_winansi(value), Face::Regular, KV_SIZE, CONTENT_W - label_w);
            let h = label_lines.len().max(value_lines.len()) as f64 * leading;
            self.ensure(h);
            let top = self.y;
            for (i, line) in label_lines.iter().enumerate() {
                put_text(
                    self.ops(),
                    (MARGIN, top + KV_SIZE + i as f64 * leading),
                    line,
                    Style(Face::Bold, KV_SIZE, GREY),
                    false,
                );
            }
            for (i, line) in value_lines.iter().enumerate() {
                let y = top + KV_SIZE + i as f64 * leading;
                put_text(self.ops(), (MARGIN + label_w, y), line, Style(Face::Regular, KV_SIZE, INK), false);
            }
            self.y += h;
        }
        self.y += 6.0;
    }

    /// A table; its last row moves to the next page with the header when `footnote` more
    /// points (the start of the note under it) would not fit after it.
    fn table(&mut self, table: &Table, footnote: f64) {
        let layout = TableLayout::new(table);
        let total: f64 = layout.widths.iter().sum();
        let header_h = layout.height(&layout.header);
        let first_h = layout.rows.first().map(|r| layout.height(r)).unwrap_or(0.0);
        let single = if layout.rows.len() == 1 { 10.0 + footnote } else { 0.0 };
        self.ensure(header_h + first_h + single);
        self.table_header(&layout, &table.right);
        for (i, row) in layout.rows.iter().enumerate() {
            let h = layout.height(row);
            let last = i + 1 == layout.rows.len();
            let needed = if last { h + 10.0 + footnote } else { h };
            if self.y + needed > BODY_BOTTOM && i > 0 {
                self.rule(total);
                self.new_page();
                self.table_header(&layout, &table.right);
            }
            let fill = (i % 2 == 1).then_some(ZEBRA_FILL);
            let y = self.y;
            layout.draw_row(self.ops(), y, row, &table.right, Face::Regular, fill);
            self.y += h;
        }
        self.rule(total);
        self.y += 10.0;
    }

    fn table_header(&mut self, layout: &TableLayout, right: &[bool]) {
        let y = self.y;
        layout.draw_row(self.ops(), y, &layout.header, right, Face::Bold, Some(HEADER_FILL));
        self.y += layout.height(&layout.header);
        self.rule(layout.widths.iter().sum());
    }

    /// A thin horizontal rule at the current position.
    fn rule(&mut self, width: f64) {
        let y = self.y;
        stroke(self.ops(), &[vec![(MARGIN, y), (MARGIN + width, y)]], RULE, 0.6, None);
    }

    fn scene(&mut self, scene: &Scene) {
        self.ensure(scene.height);
        let y = self.y;
        draw_scene(self.ops(), scene, MARGIN, y);
        self.y += scene.height + 10.0;
    }

    /// Adds the footers, now that the page count is known, and returns the pages' operations.
    fn finish(mut self, footer: &str) -> Vec<Vec<Op>> {
        let count = self.pages.len();
        let footer = text::to_winansi(footer);
        for (n, ops) in self.pages.iter_mut().enumerate() {
            stroke(ops, &[vec![(MARGIN, FOOTER_RULE), (PAGE_W - MARGIN, FOOTER_RULE)]], RULE, 0.5, None);
            let number = format!("page {} of {count}", n + 1);
            let number_w = text::width(&number, Face::Bold, FOOTER_SIZE);
            let baseline = FOOTER_RULE + 4.0 + FOOTER_SIZE;
            put_text(
                ops,
                (PAGE_W - MARGIN - number_w, baseline),
                &number,
                Style(Face::Bold, FOOTER_SIZE, GREY),
                false,
            );
            let lines = text::wrap(&footer, Face::Regular, FOOTER_SIZE, CONTENT_W - number_w - 12.0);
            for (i, line) in lines.iter().enumerate() {
                put_text(
                    ops,
                    (MARGIN, baseline + i as f64 * FOOTER_SIZE * 1.3),
                    line,
                    Style(Face::Regular, FOOTER_SIZE, GREY),
                    false,
                );
            }
        }
        self.pages
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_creation_times() {
        for ok in [
            "2025-03-01T14:05:09Z",
            "2025-03-01T14:05:09.123Z",
            "2025-03-01T14:05:09+00:00",
            "2025-03-01T14:05:09",
        ] {
            let d = pdf_date(ok).unwrap();
            assert_eq!(
                (d.year(), u8::from(d.month()), d.day(), d.hour(), d.minute(), d.second()),
                (2025, 3, 1, 14, 5, 9)
            );
        }
        for bad in [
            "2025-03-01",
            "2025-13-01T00:00:00Z",
            "2025-03-01T14:05:09+02:00",
            "yesterday",
            "2025-03-01T14:05:9Z",
        ] {
            assert!(pdf_date(bad).is_err(), "{bad} accepted");
        }
    }
}
