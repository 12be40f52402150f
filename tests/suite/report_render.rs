//! Renders a hand-built report covering every block type and checks the PDF with independent
//! tools: lopdf (structure and text), poppler's `pdfinfo` (opens without errors), `pdftotext`
//! and `pdftoppm` (the plots are drawn where their titles say). Also checks the SVG export.
//!
//! Without poppler the poppler checks are skipped with a message, unless
//! `CISTERN_REQUIRE_POPPLER=1`, which makes them mandatory (CI sets it).

use crate::common::{
    count_pixels, decode_png, find, page_texts, poppler_available, render_pages, squeeze, words,
};
use cistern::io::output::CAUTION;
use cistern::report::layout::{
    Band, BarChart, Block, Document, DoseTick, HLine, Marker, PlotSpec, Series, Stroke, Table,
};
use cistern::report::pdf::render_pdf;
use cistern::report::svg::render_svg;
use std::process::Command;

const FOOTER: &str = "cistern 0.1.0 · created 2025-03-01T14:05:09Z";
const ROWS: usize = 150;
const COMMENT_HEADER: &str = "Comment on the candidate";

/// Invented illustration data: a sum of exponential decays after doses every 12 h. It is only
/// something to draw; no value here is checked.
fn curve(t: f64) -> f64 {
    (0..8).map(|k| 12.0 * k as f64).filter(|d| *d <= t).map(|d| 10.0 * (-0.1 * (t - d)).exp()).sum()
}

fn panel(log_y: bool) -> PlotSpec {
    let xs: Vec<f64> = (-12..=192).map(|i| i as f64 * 0.5).collect();
    let ys: Vec<f64> = xs.iter().map(|&t| curve(t)).collect();
    let fit_xs: Vec<f64> = xs.iter().copied().filter(|t| *t <= 48.0).collect();
    let fit: Vec<f64> = fit_xs.iter().map(|&t| curve(t)).collect();
    let plan_xs: Vec<f64> = xs.iter().copied().filter(|t| *t >= 48.0).collect();
    let plan: Vec<f64> = plan_xs.iter().map(|&t| 1.1 * curve(t)).collect();
    PlotSpec {
        title: format!("Concentration-time, {} scale", if log_y { "log" } else { "linear" }),
        x_label: "time after the first dose (h)".into(),
        y_label: "concentration (mg/L)".into(),
        log_y,
        bands: vec![Band {
            label: "90 % prediction interval".into(),
            xs: xs.clone(),
            lo: ys.iter().map(|y| 0.7 * y).collect(),
            hi: ys.iter().map(|y| 1.35 * y).collect(),
            color: (0.2, 0.4, 0.8),
        }],
        target: Some((5.0, 15.0, "target 5–15 mg/L".into())),
        series: vec![
            Series {
                label: "individual fit".into(),
                xs: fit_xs,
                ys: fit,
                stroke: Stroke::Solid,
                color: (0.1, 0.3, 0.7),
            },
            Series {
                label: "proposed regimen".into(),
                xs: plan_xs,
                ys: plan,
                stroke: Stroke::Dashed,
                color: (0.8, 0.35, 0.05),
            },
        ],
        hlines: vec![HLine { label: "LLOQ 0.5 mg/L".into(), y: 0.5, color: (0.6, 0.1, 0.1) }],
        markers: vec![
            Marker { x: 2.0, y: 12.1, hollow: false },
            Marker { x: 11.5, y: 4.4, hollow: false },
            Marker { x: 23.0, y: 6.9, hollow: false },
            Marker { x: 40.0, y: 0.5, hollow: true },
        ],
        markers_label: "observed level".into(),
        doses: (0..8).map(|k| DoseTick { x: 12.0 * k as f64, color: (0.45, 0.15, 0.55) }).collect(),
        start_x: Some(48.0),
    }
}

fn big_table() -> Table {
    let rows = (0..ROWS)
        .map(|i| {
            vec![
                format!("id{i:03}"),
                format!("{} mg q{}h", 500 + 250 * (i % 5), [8, 12, 24][i % 3]),
                format!(
                    "start{i:03} candidate with a long explanation that needs more than one line in its cell, \
                     naming the infusion, the sampling plan and why it ranks where it does end{i:03}"
                ),
                format!("{:.2}", 0.5 + 0.003 * i as f64),
                format!("{:.1}", 300.0 + 7.3 * i as f64),
            ]
        })
        .collect();
    Table {
        headers: vec![
            "id".into(),
            "regimen".into(),
            COMMENT_HEADER.into(),
            "PTA".into(),
            "AUC24 (mg·h/L)".into(),
        ],
        rows,
        right: vec![false, false, false, true, true],
    }
}

/// A document with every block type; the sections after each page break fit on one page,
/// except the big table.
fn document() -> Document {
    Document {
        title: "Regimen report: invented demonstration subject".into(),
        caution: CAUTION.into(),
        footer: FOOTER.into(),
        created_iso: "2025-03-01T14:05:09Z".into(),
        author: Some("An Invented Author".into()),
        blocks: vec![
            Block::Heading("Summary".into()),
            Block::Paragraph(
                "A paragraph that is long enough to wrap over several lines of the page, with the \
                 characters the builtin fonts lack mapped to what they have: C ≤ 15 mg/L, σ = 0.2, \
                 k = 0.1 h⁻¹, BSA 1.9 m², 250 µg, 2–3 doses · daily."
                    .into(),
            ),
            Block::Note("A note in the smaller type, for warnings and references.".into()),
            Block::KeyValues(vec![
                ("Subject".into(), "invented demonstration subject".into()),
                ("Creatinine clearance (Cockcroft–Gault)".into(), "92 mL/min".into()),
            ]),
            Block::Table(Table {
                headers: vec!["parameter".into(), "estimate".into(), "95 % interval".into()],
                rows: vec![
                    vec!["CL (L/h)".into(), "4.1".into(), "3.2–5.3".into()],
                    vec!["V (L)".into(), "41".into(), "33–52".into()],
                ],
                right: vec![false, true, true],
            }),
            Block::PageBreak,
            Block::Plot(panel(false)),
            Block::Plot(panel(true)),
            Block::PageBreak,
            Block::Bars(BarChart {
                title: "Probability of target attainment".into(),
                labels: (0..5).map(|i| format!("{} mg q12h", 500 + 250 * i)).collect(),
                values: vec![31.0, 55.0, 78.0, 90.0, 97.0],
                axis_label: "probability of target attainment (%)".into(),
            }),
            Block::PageBreak,
            Block::Heading("All candidates".into()),
            Block::Table(big_table()),
            Block::Paragraph("The end.".into()),
        ],
    }
}

#[test]
fn pdf_structure_and_text() {
    let doc = document();
    let pdf = render_pdf(&doc).expect("renders");
    assert_eq!(pdf, render_pdf(&doc).expect("renders again"), "same document, same bytes");
    let pages = page_texts(&pdf);
    let m = pages.len();
    // Three page breaks; the big table needs several pages more: at 10 pt per row at the
    // very least, a page (under 842 pt) holds fewer than 85 rows.
    assert!(m >= 3 + ROWS.div_ceil(85), "{m} pages");
    let caution = squeeze(CAUTION);
    for (i, text) in pages.iter().enumerate() {
        let flat = squeeze(text);
        assert!(flat.contains(&caution), "page {}: no caution in {text:?}", i + 1);
        assert!(flat.contains("Notclinicaladvice"), "page {}", i + 1);
        assert!(flat.contains(&squeeze(&format!("page {} of {m}", i + 1))), "page {}: no page number", i + 1);
        assert!(flat.contains(&squeeze(FOOTER)), "page {}: no footer", i + 1);
    }
    // The sections after the page breaks start their pages.
    assert!(squeeze(&pages[0]).contains("Summary") && !squeeze(&pages[0]).contains("Concentration-time"));
    assert!(squeeze(&pages[1]).contains("Concentration-time,linearscale"));
    assert!(squeeze(&pages[1]).contains("Concentration-time,logscale"));
    assert!(squeeze(&pages[2]).contains("Probabilityoftargetattainment"));
    assert!(squeeze(&pages[3]).contains("Allcandidates"));
    // Mapped characters came through as WinAnsi.
    assert!(squeeze(&pages[0]).contains("C<=15mg/L,sigma=0.2"), "{}", pages[0]);
    // Every row of the big table is on one page: its first and last words are on the same
    // page and no other; every page with rows repeats the header.
    for i in 0..ROWS {
        let (id, start, end) = (format!("id{i:03}"), format!("start{i:03}"), format!("end{i:03}"));
        let on: Vec<usize> = (0..m).filter(|&p| pages[p].contains(&id)).collect();
        assert_eq!(on.len(), 1, "row {i} appears on pages {on:?}");
        let p = on[0];
        assert!(pages[p].contains(&start) && pages[p].contains(&end), "row {i} split across pages");
        assert!((0..m).filter(|&q| q != p).all(|q| !pages[q].contains(&end) && !pages[q].contains(&start)));
    }
    let with_rows: Vec<usize> =
        (0..m).filter(|&p| pages[p].contains("id0") || pages[p].contains("id1")).collect();
    assert!(with_rows.len() >= 2, "the big table spans pages {with_rows:?}");
    for p in with_rows {
        assert!(squeeze(&pages[p]).contains(&squeeze(COMMENT_HEADER)), "page {}: no repeated header", p + 1);
    }
}

#[test]
fn headings_stay_with_what_follows() {
    // Filler pushes a heading and its plot down the page by steps, so that for some counts
    // the heading would fit at the foot of a page while its plot would not.
    let mut moved = 0;
    for n in 20..50 {
        let mut doc = document();
        doc.blocks = (0..n).map(|i| Block::Paragraph(format!("Filler line {i}."))).collect();
        doc.blocks.push(Block::Heading("Heading of the plot".into()));
        doc.blocks.push(Block::Plot(panel(false)));
        let pages = page_texts(&render_pdf(&doc).unwrap());
        let heading = pages.iter().position(|t| squeeze(t).contains("Headingoftheplot")).unwrap();
        let plot = pages.iter().position(|t| squeeze(t).contains("Concentration-time,linearscale")).unwrap();
        assert_eq!(heading, plot, "{n} filler lines: heading on page {}, plot on {}", heading + 1, plot + 1);
        moved += usize::from(plot > 0);
    }
    assert!(moved > 0 && moved < 30, "the plot moved to page 2 for {moved} of 30 filler counts");
}

#[test]
fn rejects_malformed_content() {
    let mut doc = document();
    doc.blocks.push(Block::Table(Table {
        headers: vec!["a".into(), "b".into()],
        rows: vec![vec!["1".into()]],
        right: vec![],
    }));
    assert!(render_pdf(&doc).unwrap_err().contains("row 1 has 1 cells"));
    let mut doc = document();
    doc.created_iso = "1 March 2025".into();
    assert!(render_pdf(&doc).unwrap_err().contains("creation time"));
}

#[test]
fn poppler_opens_the_pdf_and_plots_are_drawn() {
    if !poppler_available() {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("report.pdf");
    std::fs::write(&path, render_pdf(&document()).unwrap()).unwrap();
    let m = page_texts(&std::fs::read(&path).unwrap()).len();

    let info = Command::new("pdfinfo").arg(&path).output().unwrap();
    assert!(info.status.success(), "pdfinfo: {}", String::from_utf8_lossy(&info.stderr));
    let info = String::from_utf8_lossy(&info.stdout).into_owned();
    assert!(info.lines().any(|l| l.split_whitespace().eq(["Pages:".to_string(), m.to_string()])), "{info}");
    assert!(info.contains("A4"), "page size: {info}");
    let created = info.lines().find(|l| l.starts_with("CreationDate:")).unwrap_or_default();
    assert!(created.contains("2025"), "creation date not set: {created}");

    let pngs = render_pages(&path, dir.path(), 50);
    assert_eq!(pngs.len(), m);

    // Both plot panels on page 2: between a panel's title and its x-axis label lies the data
    // area; curves, bands and the target stripe are coloured, the frame and grid are grey.
    let page2 = words(&path, 2);
    let img = decode_png(&pngs[1]);
    let x_labels: Vec<(f64, f64, f64, f64)> = {
        let mut rest = page2.as_slice();
        let mut found = Vec::new();
        while let Some(i) = rest
            .windows(5)
            .position(|w| w.iter().map(|x| x.4.as_str()).eq(["time", "after", "the", "first", "dose"]))
        {
            found.push((rest[i].0, rest[i].1, rest[i].2, rest[i].3));
            rest = &rest[i + 1..];
        }
        found
    };
    assert_eq!(x_labels.len(), 2, "x-axis labels on page 2");
    for (n, title) in ["Concentration-time, linear scale", "Concentration-time, log scale"].iter().enumerate()
    {
        let t = find(&page2, title).unwrap_or_else(|| panic!("{title} not on page 2"));
        let bottom = x_labels[n].1;
        assert!(bottom > t.3 + 100.0, "{title}: panel from {} to {bottom}", t.3);
        let area = (t.0, t.3, 595.0 - t.0, bottom - 12.0);
        let (coloured, inked) = count_pixels(&img, area, 50.0);
        let total = ((area.2 - area.0) * (area.3 - area.1) * (50.0f64 / 72.0).powi(2)) as usize;
        assert!(coloured > total / 20, "{title}: {coloured} coloured pixels of {total}");
        assert!(inked > total / 10, "{title}: {inked} inked pixels of {total}");
    }

    // Right-aligned table columns end at one x, which holds only if the text widths we
    // measure are the widths poppler draws.
    let page1 = words(&path, 1);
    let ends: Vec<f64> = ["4.1", "41"].iter().map(|w| page1.iter().find(|x| x.4 == *w).unwrap().2).collect();
    assert!((ends[0] - ends[1]).abs() < 0.05, "right-aligned column ends at {ends:?}");
    let texts = page_texts(&std::fs::read(&path).unwrap());
    let last_rows = 1 + (0..m).find(|&p| texts[p].contains(&format!("id{:03}", ROWS - 1))).unwrap();
    let page = words(&path, last_rows);
    let pta: Vec<f64> =
        page.iter().filter(|w| w.4.len() == 4 && w.4.starts_with("0.")).map(|w| w.2).collect();
    assert!(pta.len() > 3);
    assert!(pta.iter().all(|x| (x - pta[0]).abs() < 0.05), "PTA column ends at {pta:?}");
}

#[test]
fn svg_is_well_formed_with_labels_and_one_path_per_series() {
    let panels = [panel(false), panel(true)];
    let svg = render_svg(&panels, "Not clinical advice: a test caution.");
    // Balanced tags: every opened element is closed, in order.
    let mut stack: Vec<String> = Vec::new();
    for chunk in svg.split('<').skip(1) {
        let tag = chunk.split('>').next().unwrap();
        let name: String = tag.trim_start_matches('/').chars().take_while(|c| c.is_alphanumeric()).collect();
        if tag.starts_with('/') {
            assert_eq!(stack.pop().as_deref(), Some(name.as_str()), "unbalanced </{name}>");
        } else if !tag.ends_with('/') {
            stack.push(name);
        }
    }
    assert!(stack.is_empty(), "unclosed: {stack:?}");
    assert!(svg.starts_with("<svg ") && svg.trim_end().ends_with("</svg>"));
    for label in ["time after the first dose (h)", "concentration (mg/L)", "Concentration-time, log scale"] {
        assert!(svg.contains(&format!(">{label}</text>")), "{label} missing");
    }
    let series = panels.iter().map(|p| p.series.len()).sum::<usize>();
    assert_eq!(svg.matches(r#"<path class="series""#).count(), series);
    assert_eq!(svg.matches("<circle").count(), 2 * (4 + 2), "4 levels and 2 legend dots per panel");
}

/// The y coordinates of the first path of `svg` whose tag holds `marker`.
fn path_ys(svg: &str, marker: &str) -> Vec<f64> {
    let tag =
        svg.split("<path").find(|t| t.contains(marker)).unwrap_or_else(|| panic!("no path with {marker}"));
    let d = tag.split("d=\"").nth(1).unwrap().split('"').next().unwrap();
    d.split(['M', 'L', 'Z'])
        .filter(|p| !p.is_empty())
        .map(|p| p.split(' ').nth(1).unwrap().parse().unwrap())
        .collect()
}

/// A one-sided target (`trough ≤ 15`) filled most of a logarithmic panel as a stripe down to
/// the axis. It is now a line at its bound with a 10-pt shade on the side that meets it; a
/// two-sided target stays a stripe between its bounds, without the line.
#[test]
fn a_one_sided_target_is_a_line_with_a_shaded_side() {
    let shade = "fill=\"#ccebcc\"";
    let mut upper = panel(true);
    upper.target = Some((0.0, 15.0, "trough target: at most 15 mg/L".into()));
    let svg = render_svg(&[upper], "caution");
    let fill = path_ys(&svg, shade);
    let (top, bottom) =
        (fill.iter().copied().fold(f64::INFINITY, f64::min), fill.iter().copied().fold(0.0, f64::max));
    assert!((bottom - top - 10.0).abs() < 0.02, "the shade is 10 pt high, not {}", bottom - top);
    let line = path_ys(&svg, "class=\"target\"");
    assert!(
        line.iter().all(|y| (y - top).abs() < 0.02),
        "the line {line:?} lies on the bound at {top}, the shade below it"
    );
    let mut lower = panel(true);
    lower.target = Some((5.0, f64::INFINITY, "at least 5 mg/L".into()));
    let svg = render_svg(&[lower], "caution");
    let fill = path_ys(&svg, shade);
    let bottom = fill.iter().copied().fold(0.0, f64::max);
    let line = path_ys(&svg, "class=\"target\"");
    assert!(line.iter().all(|y| (y - bottom).abs() < 0.02), "the shade lies above the lower bound's line");
    // Two-sided: a stripe from 5 to 15 mg/L, taller than the shade, and no line.
    let svg = render_svg(&[panel(true)], "caution");
    let fill = path_ys(&svg, shade);
    let height =
        fill.iter().copied().fold(0.0, f64::max) - fill.iter().copied().fold(f64::INFINITY, f64::min);
    assert!(height > 20.0, "{height}");
    assert!(!svg.contains("class=\"target\""));
}
