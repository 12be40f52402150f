//! Text for the builtin PDF fonts: what they can show, how wide it is, and where lines break.
//!
//! The builtin Helvetica fonts are single-byte WinAnsi fonts (PDF 32000-1:2008, Annex D.2), and
//! printpdf without its `text_layout` feature cannot measure text. So this module maps text to
//! what WinAnsi can show (spelling out the rest: `≤` → `<=`, `σ` → `sigma`) and measures it
//! with the fonts' advance widths. A PDF viewer lays out the standard fonts with these same
//! metrics, so a measured width is the drawn width.

/// The two faces the report uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Face {
    /// Helvetica.
    Regular,
    /// Helvetica-Bold.
    Bold,
}

/// Height of a capital letter above the baseline, per unit font size (Helvetica AFM
/// `CapHeight 718`).
#[cfg(feature = "pdf")]
pub const CAP_HEIGHT: f64 = 0.718;

/// Advance widths in 1/1000 em for WinAnsi codes 32–255 (0 where the code is unassigned).
/// From Adobe's Helvetica and Helvetica-Bold AFM files (version 003.001, as shipped in groff's
/// `devps` HR and HB metric files), indexed through the WinAnsi glyph names of PDF 32000-1,
/// Annex D.2 — except `µ` (0xB5), which that version widens to 578: the standard-14 metrics
/// that viewers apply have 556, as poppler's `pdftotext -bbox` measured on this machine for
/// every code here. The unit test checks the table against printpdf's bundled font data.
const HELVETICA: [u16; 224] = [
    278, 278, 355, 556, 556, 889, 667, 191, 333, 333, 389, 584, 278, 333, 278, 278, //
    556, 556, 556, 556, 556, 556, 556, 556, 556, 556, 278, 278, 584, 584, 584, 556, //
    1015, 667, 667, 722, 722, 667, 611, 778, 722, 278, 500, 667, 556, 833, 722, 778, //
    667, 778, 722, 667, 611, 722, 667, 944, 667, 667, 611, 278, 278, 278, 469, 556, //
    333, 556, 556, 500, 556, 556, 278, 556, 556, 222, 222, 500, 222, 833, 556, 556, //
    556, 556, 333, 500, 278, 556, 500, 722, 500, 500, 500, 334, 260, 334, 584, 0, //
    556, 0, 222, 556, 333, 1000, 556, 556, 333, 1000, 667, 333, 1000, 0, 611, 0, //
    0, 222, 222, 333, 333, 350, 556, 1000, 333, 1000, 500, 333, 944, 0, 500, 667, //
    278, 333, 556, 556, 556, 556, 260, 556, 333, 737, 370, 556, 584, 333, 737, 333, //
    400, 584, 333, 333, 333, 556, 537, 278, 333, 333, 365, 556, 834, 834, 834, 611, //
    667, 667, 667, 667, 667, 667, 1000, 722, 667, 667, 667, 667, 278, 278, 278, 278, //
    722, 722, 778, 778, 778, 778, 778, 584, 778, 722, 722, 722, 722, 667, 667, 611, //
    556, 556, 556, 556, 556, 556, 889, 500, 556, 556, 556, 556, 278, 278, 278, 278, //
    556, 556, 556, 556, 556, 556, 556, 584, 611, 556, 556, 556, 556, 500, 556, 500, //
];

/// As [`HELVETICA`], for Helvetica-Bold.
const HELVETICA_BOLD: [u16; 224] = [
    278, 333, 474, 556, 556, 889, 722, 238, 333, 333, 389, 584, 278, 333, 278, 278, //
    556, 556, 556, 556, 556, 556, 556, 556, 556, 556, 333, 333, 584, 584, 584, 611, //
    975, 722, 722, 722, 722, 667, 611, 778, 722, 278, 556, 722, 611, 833, 722, 778, //
    667, 778, 722, 667, 611, 722, 667, 944, 667, 667, 611, 333, 278, 333, 584, 556, //
    333, 556, 611, 556, 611, 556, 333, 611, 611, 278, 278, 556, 278, 889, 611, 611, //
    611, 611, 389, 556, 333, 611, 556, 778, 556, 556, 500, 389, 280, 389, 584, 0, //
    556, 0, 278, 556, 500, 1000, 556, 556, 333, 1000, 667, 333, 1000, 0, 611, 0, //
    0, 278, 278, 500, 500, 350, 556, 1000, 333, 1000, 556, 333, 944, 0, 500, 667, //
    278, 333, 556, 556, 556, 556, 280, 556, 333, 737, 370, 556, 584, 333, 737, 333, //
    400, 584, 333, 333, 333, 611, 556, 278, 333, 333, 365, 556, 834, 834, 834, 611, //
    722, 722, 722, 722, 722, 722, 1000, 722, 667, 667, 667, 667, 278, 278, 278, 278, //
    722, 722, 778, 778, 778, 778, 778, 584, 778, 722, 722, 722, 722, 667, 667, 611, //
    556, 556, 556, 556, 556, 556, 889, 556, 556, 556, 556, 556, 278, 278, 278, 278, //
    611, 611, 611, 611, 611, 611, 611, 584, 611, 611, 611, 611, 611, 556, 611, 556, //
];

/// The WinAnsi code of `c`, if the encoding has it (PDF 32000-1, Annex D.2: ASCII and Latin-1
/// agree with WinAnsi except in 0x80–0x9F, which holds typographic punctuation).
pub fn winansi_code(c: char) -> Option<u8> {
    if let cp @ (0x20..=0x7E | 0xA0..=0xFF) = u32::from(c) {
        return Some(cp as u8);
    }
    Some(match c {
        '€' => 0x80,
        '‚' => 0x82,
        'ƒ' => 0x83,
        '„' => 0x84,
        '…' => 0x85,
        '†' => 0x86,
        '‡' => 0x87,
        'ˆ' => 0x88,
        '‰' => 0x89,
        'Š' => 0x8A,
        '‹' => 0x8B,
        'Œ' => 0x8C,
        'Ž' => 0x8E,
        '\u{2018}' => 0x91,
        '\u{2019}' => 0x92,
        '\u{201C}' => 0x93,
        '\u{201D}' => 0x94,
        '•' => 0x95,
        '–' => 0x96,
        '—' => 0x97,
        '˜' => 0x98,
        '™' => 0x99,
        'š' => 0x9A,
        '›' => 0x9B,
        'œ' => 0x9C,
        'ž' => 0x9E,
        'Ÿ' => 0x9F,
        _ => return None,
    })
}

/// A spelling in WinAnsi for a character the encoding lacks, for the characters the report's
/// texts use (mathematical signs, Greek letters, sub- and superscript digits).
fn spell(c: char) -> Option<&'static str> {
    Some(match c {
        '≤' | '⩽' => "<=",
        '≥' | '⩾' => ">=",
        '≠' => "!=",
        '≈' => "~",
        '−' | '‐' | '‑' | '‒' => "-",
        '→' => "->",
        '←' => "<-",
        '∞' => "inf",
        '√' => "sqrt",
        '∑' => "sum",
        '∙' | '⋅' => "·",
        '′' => "'",
        '″' => "\"",
        '\u{2009}' | '\u{200A}' | '\u{202F}' | '\u{2002}' | '\u{2003}' => " ",
        'α' => "alpha",
        'β' => "beta",
        'γ' => "gamma",
        'δ' => "delta",
        'ε' => "epsilon",
        'η' => "eta",
        'θ' => "theta",
        'κ' => "kappa",
        'λ' => "lambda",
        'μ' => "µ",
        'ν' => "nu",
        'π' => "pi",
        'ρ' => "rho",
        'σ' => "sigma",
        'τ' => "tau",
        'φ' => "phi",
        'χ' => "chi",
        'ω' => "omega",
        'Δ' => "Delta",
        'Σ' => "Sigma",
        'Ω' => "Omega",
        '₀' => "0",
        '₁' => "1",
        '₂' => "2",
        '₃' => "3",
        '₄' => "4",
        '₅' => "5",
        '₆' => "6",
        '₇' => "7",
        '₈' => "8",
        '₉' => "9",
        '\t' => " ",
        _ => return None,
    })
}

/// The ASCII digit or sign a superscript character stands for.
fn superscript(c: char) -> Option<char> {
    Some(match c {
        '⁰' => '0',
        '¹' => '1',
        '²' => '2',
        '³' => '3',
        '⁴' => '4',
        '⁵' => '5',
        '⁶' => '6',
        '⁷' => '7',
        '⁸' => '8',
        '⁹' => '9',
        '⁻' => '-',
        '⁺' => '+',
        _ => return None,
    })
}

/// `text` as the builtin fonts can show it. Newlines are kept (they are line breaks for
/// [`wrap`]); a run of superscripts that WinAnsi has (`m²`) stays, any other run becomes `^…`
/// (`h⁻¹` → `h^-1`); characters without a spelling become `?`, as printpdf would print them.
pub fn to_winansi(text: &str) -> String {
    let chars: Vec<char> = text.chars().collect();
    let mut out = String::with_capacity(text.len());
    let mut i = 0;
    while i < chars.len() {
        let c = chars[i];
        if superscript(c).is_some() {
            let end = (i..chars.len()).find(|&j| superscript(chars[j]).is_none()).unwrap_or(chars.len());
            let run = &chars[i..end];
            if run.iter().all(|&s| winansi_code(s).is_some()) {
                out.extend(run);
            } else {
                out.push('^');
                out.extend(run.iter().filter_map(|&s| superscript(s)));
            }
            i = end;
            continue;
        }
        if c == '\n' || winansi_code(c).is_some() {
            out.push(c);
        } else {
            out.push_str(spell(c).unwrap_or("?"));
        }
        i += 1;
    }
    out
}

/// Advance width of one character in 1/1000 em; characters the font cannot show are measured
/// as the `?` they are printed as.
fn advance(c: char, face: Face) -> u16 {
    let table = match face {
        Face::Regular => &HELVETICA,
        Face::Bold => &HELVETICA_BOLD,
    };
    let code = winansi_code(c).unwrap_or(b'?');
    match table[usize::from(code) - 32] {
        0 => table[usize::from(b'?') - 32],
        w => w,
    }
}

/// Width of `text` (already mapped with [`to_winansi`]) set in `face` at `size` points, in
/// points.
pub fn width(text: &str, face: Face, size: f64) -> f64 {
    text.chars().map(|c| f64::from(advance(c, face))).sum::<f64>() * size / 1000.0
}

/// Breaks `text` (already mapped with [`to_winansi`]) into lines no wider than `max` points:
/// at spaces where possible, inside a word only when the word alone is too wide. Newlines
/// start a new line. Always returns at least one line.
pub fn wrap(text: &str, face: Face, size: f64, max: f64) -> Vec<String> {
    let mut lines = Vec::new();
    for paragraph in text.split('\n') {
        let mut line = String::new();
        for word in paragraph.split(' ').filter(|w| !w.is_empty()) {
            let candidate = if line.is_empty() { word.to_string() } else { format!("{line} {word}") };
            if width(&candidate, face, size) <= max {
                line = candidate;
                continue;
            }
            if !line.is_empty() {
                lines.push(std::mem::take(&mut line));
            }
            // The word starts a line; split it if it is wider than a line.
            for c in word.chars() {
                let mut longer = line.clone();
                longer.push(c);
                if !line.is_empty() && width(&longer, face, size) > max {
                    lines.push(std::mem::take(&mut line));
                    line.push(c);
                } else {
                    line = longer;
                }
            }
        }
        lines.push(line);
    }
    lines
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The AFM widths agree with the Helvetica clones printpdf bundles (its own metric data,
    /// an independent source) for every WinAnsi character both define, except a few glyphs
    /// where the clone's design differs from Adobe's; for those, poppler's standard-14 metrics
    /// (measured with `pdftotext -bbox`) side with the table.
    #[test]
    #[cfg(feature = "pdf")]
    fn afm_widths_match_printpdf_font_data() {
        use printpdf::BuiltinFont;
        for (face, font, known) in [
            (Face::Regular, BuiltinFont::Helvetica, "±µ÷€”"),
            (Face::Bold, BuiltinFont::HelveticaBold, "±µ÷€”"),
        ] {
            let parsed = font.get_parsed_font().expect("printpdf bundles the builtin font data");
            let upm = f64::from(parsed.units_per_em);
            let mut compared = 0;
            let mut differing = String::new();
            let c1 = "€‚ƒ„…†‡ˆ‰Š‹ŒŽ\u{2018}\u{2019}\u{201C}\u{201D}•–—˜™š›œžŸ";
            for c in (' '..='~').chain('\u{A0}'..='ÿ').chain(c1.chars()) {
                let Some(gid) = parsed.codepoint_to_glyph.get(&u32::from(c)) else { continue };
                let Some(w) = parsed.get_glyph_width(*gid) else { continue };
                compared += 1;
                // Font units at 2048/em round to within one 1/1000-em unit.
                if (f64::from(w) * 1000.0 / upm - f64::from(advance(c, face))).abs() > 1.0 {
                    differing.push(c);
                }
            }
            assert!(compared > 180, "{font:?}: only {compared} characters compared");
            assert_eq!(differing, known, "{font:?}: characters whose widths differ");
        }
    }

    #[test]
    fn measures_known_strings() {
        // "Hello" in Helvetica: H 722 + e 556 + l 222 + l 222 + o 556 = 2278 (Helvetica AFM).
        assert!((width("Hello", Face::Regular, 10.0) - 22.78).abs() < 1e-9);
        // Bold: H 722 + e 556 + l 278 + l 278 + o 611 = 2445 (Helvetica-Bold AFM).
        assert!((width("Hello", Face::Bold, 10.0) - 24.45).abs() < 1e-9);
    }

    #[test]
    fn maps_text_to_winansi() {
        assert_eq!(to_winansi("C ≤ 2 mg/L, σ = 0.1"), "C <= 2 mg/L, sigma = 0.1");
        assert_eq!(to_winansi("1.2 h⁻¹, 1.73 m², 5 µg, 2–3 · x"), "1.2 h^-1, 1.73 m², 5 µg, 2–3 · x");
        assert_eq!(to_winansi("CL₀ ✓"), "CL0 ?");
        assert!(to_winansi("≤σ⁻¹–·²µ…").chars().all(|c| winansi_code(c).is_some()));
    }

    #[test]
    fn wraps_within_width() {
        let text =
            "The quick brown fox jumps over the lazy dog, then an extraordinarilylongwordthatcannotfit.";
        let max = 60.0;
        let lines = wrap(text, Face::Regular, 10.0, max);
        assert!(lines.len() > 3);
        for line in &lines {
            assert!(width(line, Face::Regular, 10.0) <= max, "{line:?} too wide");
        }
        // Nothing is lost: the words come back in order.
        assert_eq!(lines.concat().replace(' ', ""), text.replace(' ', ""));
        assert_eq!(wrap("a\nb", Face::Regular, 10.0, 100.0), vec!["a", "b"]);
        assert_eq!(wrap("", Face::Regular, 10.0, 100.0), vec![""]);
    }
}
