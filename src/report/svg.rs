//! The report's plot as a standalone SVG (for papers): the same panels as in the PDF, laid out
//! by the plot geometry the PDF backend shares, stacked vertically. Units are points. Each text carries its Helvetica width
//! (`textLength`), so a viewer that substitutes a wider font still keeps the layout.

use super::layout::{PlotSpec, Rgb};
use super::plot::{self, Anchor, Scene, Shape};
use super::text::{self, Face};
use std::fmt::Write;

/// Panel size in points (about 16.9 × 9.5 cm, a full-width figure).
const PANEL_W: f64 = 480.0;
const PANEL_H: f64 = 270.0;

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

fn rgb((r, g, b): Rgb) -> String {
    let c = |v: f32| (v.clamp(0.0, 1.0) * 255.0).round() as u8;
    format!("#{:02x}{:02x}{:02x}", c(r), c(g), c(b))
}

/// Coordinates with two decimals: enough at point scale, and stable text.
fn num(v: f64) -> String {
    let s = format!("{v:.2}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" { "0".into() } else { s.into() }
}

fn path_data(runs: &[Vec<(f64, f64)>], close: bool) -> String {
    let mut d = String::new();
    for run in runs {
        for (i, (x, y)) in run.iter().enumerate() {
            let _ = write!(d, "{}{} {}", if i == 0 { "M" } else { "L" }, num(*x), num(*y));
        }
        if close {
            d.push('Z');
        }
    }
    d
}

/// Size and line height of the caution under the panels.
const CAUTION_SIZE: f64 = 7.0;
const CAUTION_LINE: f64 = 9.0;

/// Renders the panels as one SVG document, with `caution` in small print under them (the
/// figure may travel without the report around it).
pub fn render_svg(panels: &[PlotSpec], caution: &str) -> String {
    let scenes: Vec<Scene> = panels.iter().map(|spec| plot::plot_scene(spec, PANEL_W, PANEL_H)).collect();
    render_scenes(&scenes, caution)
}

/// Renders laid-out scenes stacked vertically as one SVG document, as wide as the widest, with
/// `caution` in small print under them.
pub fn render_scenes(scenes: &[Scene], caution: &str) -> String {
    let width = scenes.iter().map(|s| s.width).fold(0.0, f64::max);
    let caution_lines =
        text::wrap(caution, Face::Regular, CAUTION_SIZE, (width - 8.0) / plot::SUBSTITUTE_FONT_SLACK);
    let panels_h: f64 = scenes.iter().map(|s| s.height).sum();
    let height = panels_h + CAUTION_LINE * caution_lines.len() as f64 + 6.0;
    let mut out = String::new();
    let _ = writeln!(
        out,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}pt" height="{h}pt" viewBox="0 0 {w} {h}" font-family="Helvetica, Arial, sans-serif">"#,
        w = num(width),
        h = num(height)
    );
    let _ =
        writeln!(out, r#"<rect x="0" y="0" width="{}" height="{}" fill="white"/>"#, num(width), num(height));
    let mut top = 0.0;
    for scene in scenes {
        let _ = writeln!(out, r#"<g transform="translate(0 {})">"#, num(top));
        top += scene.height;
        for shape in &scene.shapes {
            match shape {
                Shape::Line { class, runs, color, width, dash } => {
                    let dash = dash
                        .map(|(on, off)| format!(r#" stroke-dasharray="{} {}""#, num(on), num(off)))
                        .unwrap_or_default();
                    let _ = writeln!(
                        out,
                        r#"<path class="{class}" d="{}" fill="none" stroke="{}" stroke-width="{}" stroke-linejoin="round"{dash}/>"#,
                        path_data(runs, false),
                        rgb(*color),
                        num(*width)
                    );
                }
                Shape::Fill { points, color } => {
                    let _ = writeln!(
                        out,
                        r#"<path d="{}" fill="{}"/>"#,
                        path_data(std::slice::from_ref(points), true),
                        rgb(*color)
                    );
                }
                Shape::Dot { center, radius, color, hollow } => {
                    let (fill, stroke) = if *hollow {
                        ("white".to_string(), format!(r#" stroke="{}" stroke-width="1""#, rgb(*color)))
                    } else {
                        (rgb(*color), String::new())
                    };
                    let _ = writeln!(
                        out,
                        r#"<circle cx="{}" cy="{}" r="{}" fill="{fill}"{stroke}/>"#,
                        num(center.0),
                        num(center.1),
                        num(*radius)
                    );
                }
                Shape::Text { at, text: label, size, face, anchor, vertical, color } => {
                    let anchor = match anchor {
                        Anchor::Start => "start",
                        Anchor::Middle => "middle",
                        Anchor::End => "end",
                    };
                    let weight = if *face == Face::Bold { r#" font-weight="bold""# } else { "" };
                    let rotate = if *vertical {
                        format!(r#" transform="rotate(-90 {} {})""#, num(at.0), num(at.1))
                    } else {
                        String::new()
                    };
                    let _ = writeln!(
                        out,
                        r#"<text x="{}" y="{}" font-size="{}" text-anchor="{anchor}" fill="{}"{weight}{rotate} textLength="{}" lengthAdjust="spacingAndGlyphs">{}</text>"#,
                        num(at.0),
                        num(at.1),
                        num(*size),
                        rgb(*color),
                        num(text::width(label, *face, *size)),
                        esc(label)
                    );
                }
            }
        }
        out.push_str("</g>\n");
    }
    for (i, line) in caution_lines.iter().enumerate() {
        let _ = writeln!(
            out,
            r#"<text x="4" y="{}" font-size="{}" fill="{}" textLength="{}" lengthAdjust="spacingAndGlyphs">{}</text>"#,
            num(panels_h + 4.0 + CAUTION_LINE * (i as f64 + 0.8)),
            num(CAUTION_SIZE),
            rgb((0.45, 0.1, 0.1)),
            num(text::width(line, Face::Regular, CAUTION_SIZE)),
            esc(line)
        );
    }
    out.push_str("</svg>\n");
    out
}
