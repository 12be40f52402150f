//! Helpers shared by the integration test modules.

/// Relative error of `actual` against `expected`, measured against at least `floor`, so that
/// values which are essentially zero are compared absolutely (to `floor` times the tolerance).
pub fn rel_err(actual: f64, expected: f64, floor: f64) -> f64 {
    (actual - expected).abs() / expected.abs().max(floor)
}

/// Panics with `what` unless `actual` is within relative `tol` of `expected` (see [`rel_err`]).
#[track_caller]
pub fn assert_rel(actual: f64, expected: f64, tol: f64, floor: f64, what: &str) {
    let err = rel_err(actual, expected, floor);
    assert!(
        err <= tol && actual.is_finite(),
        "{what}: got {actual:e}, expected {expected:e}, relative error {err:e} > {tol:e}"
    );
}

/// Panics with `what` unless `actual` is within `tol` of `expected`.
#[track_caller]
pub fn assert_abs(actual: f64, expected: f64, tol: f64, what: &str) {
    assert!((actual - expected).abs() <= tol, "{what}: got {actual}, expected {expected} ± {tol}");
}

/// Where a unimodal `f` peaks on [lo, hi], by golden-section search on its values alone (no
/// formula for the peak is used). Near a smooth maximum values are flat to rounding over a
/// width of about √ε relative, which bounds the precision of the location.
pub fn argmax(f: impl Fn(f64) -> f64, mut lo: f64, mut hi: f64) -> f64 {
    let r = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = (hi - r * (hi - lo), lo + r * (hi - lo));
    let (mut fa, mut fb) = (f(a), f(b));
    for _ in 0..200 {
        if fa < fb {
            lo = a;
            a = b;
            fa = fb;
            b = lo + r * (hi - lo);
            fb = f(b);
        } else {
            hi = b;
            b = a;
            fb = fa;
            a = hi - r * (hi - lo);
            fa = f(a);
        }
    }
    0.5 * (lo + hi)
}

// ---- Running the binary and reading its PDFs (report and case-file tests) ----

/// What one run of the binary produced.
pub struct Ran {
    /// Exit code.
    pub code: i32,
    /// Standard output.
    pub stdout: String,
    /// Standard error.
    pub stderr: String,
}

/// Run `cistern ARGS` in `dir` with the creation time of reports fixed to `epoch` seconds.
pub fn cistern_at(dir: &std::path::Path, args: &[&str], epoch: &str) -> Ran {
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(args).current_dir(dir).env("SOURCE_DATE_EPOCH", epoch);
    ran(command)
}

/// Run a command to its end and keep what it printed.
pub fn ran(mut command: std::process::Command) -> Ran {
    let out = command.output().expect("the command runs");
    Ran {
        code: out.status.code().expect("exited, not killed by a signal"),
        stdout: String::from_utf8(out.stdout).expect("stdout is UTF-8"),
        stderr: String::from_utf8(out.stderr).expect("stderr is UTF-8"),
    }
}

/// Fit the demo study in `dir` (a [`demo_copy`]) and save it with 2,000 posterior draws as
/// `fit.json`, the input of `cistern plan --fit`; panics unless the fit succeeds.
pub fn save_demo_fit(dir: &std::path::Path) {
    let args = demo_args("fit", &["--keep-draws", "2000", "--format", "json", "-o", "fit.json"]);
    let fit = cistern_at(dir, &args, "0");
    assert_eq!(fit.code, 0, "{}", fit.stderr);
}

/// A temporary directory holding a copy of `demo-regimens/` (the invented demo scenario).
pub fn demo_copy() -> tempfile::TempDir {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let demo = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-regimens");
    for entry in std::fs::read_dir(&demo).expect("demo-regimens/ is there") {
        let path = entry.expect("a directory entry").path();
        if path.is_file() {
            std::fs::copy(&path, dir.path().join(path.file_name().unwrap())).expect("copy a demo file");
        }
    }
    dir
}

/// The names in a directory, sorted: what a run left behind, compared before and after.
pub fn entries(dir: &std::path::Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
}

/// One 1-g regimen every 12 h as 1-h infusions, with an AUC24 target: the candidate grid and
/// target of tests that need some regimen, not a particular one.
pub const ONE_REGIMEN: [&str; 8] =
    ["--amounts", "1g", "--every", "12h", "--durations", "1h", "--target", "auc24=400..600"];

/// The demo study's files as flags, for a command run in a [`demo_copy`].
pub const DEMO_STUDY: [&str; 8] = [
    "--model",
    "model.toml",
    "--doses",
    "doses.csv",
    "--levels",
    "levels.csv",
    "--covariates",
    "covariates.csv",
];

/// `command`, the demo study's flags ([`DEMO_STUDY`]) and `rest`: a command line for a
/// [`demo_copy`].
pub fn demo_args<'a>(command: &'a str, rest: &[&'a str]) -> Vec<&'a str> {
    [command].into_iter().chain(DEMO_STUDY).chain(rest.iter().copied()).collect()
}

/// Whitespace removed, so that text wrapped over lines still matches.
pub fn squeeze(s: &str) -> String {
    s.chars().filter(|c| !c.is_whitespace()).collect()
}

/// The text of every page, as lopdf (an independent PDF reader) extracts it.
pub fn page_texts(pdf: &[u8]) -> Vec<String> {
    let doc = lopdf::Document::load_mem(pdf).expect("lopdf parses the PDF");
    let n = doc.get_pages().len() as u32;
    (1..=n).map(|p| doc.extract_text(&[p]).expect("text of a page")).collect()
}

/// Whether the poppler tools are here; without them the caller skips, unless they are
/// required (`CISTERN_REQUIRE_POPPLER=1`, which CI sets).
pub fn poppler_available() -> bool {
    let found = ["pdfinfo", "pdftoppm", "pdftotext"]
        .iter()
        .all(|tool| std::process::Command::new(tool).arg("-v").output().is_ok_and(|o| o.status.success()));
    if !found {
        assert!(
            std::env::var("CISTERN_REQUIRE_POPPLER").as_deref() != Ok("1"),
            "CISTERN_REQUIRE_POPPLER=1 but pdfinfo, pdftoppm or pdftotext (poppler-utils) is missing"
        );
        eprintln!("skipped: the poppler checks need pdfinfo, pdftoppm and pdftotext (Debian: poppler-utils)");
    }
    found
}

/// A word's box on a page, in points from the top-left: (xmin, ymin, xmax, ymax, word).
pub type Word = (f64, f64, f64, f64, String);

/// The words of a page (1-based) with their boxes, from `pdftotext -bbox`.
pub fn words(pdf: &std::path::Path, page: usize) -> Vec<Word> {
    let p = page.to_string();
    let out = std::process::Command::new("pdftotext")
        .args(["-bbox", "-f", &p, "-l", &p])
        .arg(pdf)
        .arg("-")
        .output()
        .unwrap();
    assert!(out.status.success());
    let html = String::from_utf8_lossy(&out.stdout).into_owned();
    let attr = |tag: &str, name: &str| -> f64 {
        let at = tag.find(&format!("{name}=\"")).unwrap() + name.len() + 2;
        tag[at..].split('"').next().unwrap().parse().unwrap()
    };
    html.split("<word ")
        .skip(1)
        .map(|chunk| {
            let (tag, rest) = chunk.split_once('>').unwrap();
            let word = rest.split("</word>").next().unwrap().to_string();
            (attr(tag, "xMin"), attr(tag, "yMin"), attr(tag, "xMax"), attr(tag, "yMax"), word)
        })
        .collect()
}

/// The boxes of every run of consecutive words that reads `phrase`, in page order.
pub fn find_all(words: &[Word], phrase: &str) -> Vec<(f64, f64, f64, f64)> {
    let want: Vec<&str> = phrase.split_whitespace().collect();
    words
        .windows(want.len())
        .filter(|w| w.iter().zip(&want).all(|(a, b)| a.4 == *b))
        .map(|w| {
            (
                w[0].0,
                w.iter().map(|x| x.1).fold(f64::MAX, f64::min),
                w[w.len() - 1].2,
                w.iter().map(|x| x.3).fold(0.0, f64::max),
            )
        })
        .collect()
}

/// The box of the first run of words that reads `phrase`.
pub fn find(words: &[Word], phrase: &str) -> Option<(f64, f64, f64, f64)> {
    find_all(words, phrase).into_iter().next()
}

/// A decoded 8-bit RGB image.
pub struct Image {
    /// Width in pixels.
    pub width: usize,
    /// Height in pixels.
    pub height: usize,
    /// Row-major RGB bytes.
    pub rgb: Vec<u8>,
}

/// Decode a PNG written by `pdftoppm -png`.
pub fn decode_png(path: &std::path::Path) -> Image {
    let decoder = png::Decoder::new(std::fs::File::open(path).unwrap());
    let mut reader = decoder.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).unwrap();
    assert_eq!((info.color_type, info.bit_depth), (png::ColorType::Rgb, png::BitDepth::Eight));
    buf.truncate(info.buffer_size());
    Image { width: info.width as usize, height: info.height as usize, rgb: buf }
}

/// Pixels in a rectangle (in points, at `dpi`) that are coloured (not white, grey or black)
/// and that are not white.
pub fn count_pixels(img: &Image, (x0, y0, x1, y1): (f64, f64, f64, f64), dpi: f64) -> (usize, usize) {
    let px = |v: f64| (v * dpi / 72.0).round() as usize;
    let (mut coloured, mut inked) = (0, 0);
    for y in px(y0)..px(y1).min(img.height) {
        for x in px(x0)..px(x1).min(img.width) {
            let i = 3 * (y * img.width + x);
            let (r, g, b) = (img.rgb[i], img.rgb[i + 1], img.rgb[i + 2]);
            if r.max(g).max(b) - r.min(g).min(b) > 24 {
                coloured += 1;
            }
            if r.min(g).min(b) < 235 {
                inked += 1;
            }
        }
    }
    (coloured, inked)
}

/// Render every page of `pdf` to PNG at `dpi` with `pdftoppm`, into `dir`; the images in page
/// order.
pub fn render_pages(pdf: &std::path::Path, dir: &std::path::Path, dpi: u32) -> Vec<std::path::PathBuf> {
    let prefix = dir.join("page");
    let status = std::process::Command::new("pdftoppm")
        .args(["-r", &dpi.to_string(), "-png"])
        .arg(pdf)
        .arg(&prefix)
        .status()
        .unwrap();
    assert!(status.success(), "pdftoppm failed on {}", pdf.display());
    let mut pngs: Vec<_> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| {
            p.extension().is_some_and(|e| e == "png")
                && p.file_name().is_some_and(|n| n.to_string_lossy().starts_with("page"))
        })
        .collect();
    // pdftoppm pads the page numbers to one width, so names sort in page order.
    pngs.sort();
    pngs
}

// ---- The published check cases ----

/// The published check case named `name` from `cistern::verify::cases()`, the one place that
/// states each case's expected value, source and tolerance (docs/references.md lists them).
pub fn published(name: &str) -> cistern::verify::Case {
    cistern::verify::cases()
        .into_iter()
        .find(|c| c.name == name)
        .unwrap_or_else(|| panic!("no published check case is named {name:?}"))
}

/// Panics with `what` unless `actual` is within the stated tolerance of the expected value of
/// the published case `name` (see [`published`]); used where a test reaches the case's value
/// through another code path than the catalogue's own computation.
#[track_caller]
pub fn assert_published(actual: f64, name: &str, what: &str) {
    let case = published(name);
    assert!(
        case.tolerance.allows(actual, case.expected),
        "{what}: got {actual}, expected {} {} ({name}; {})",
        case.expected,
        case.tolerance.label(),
        case.source
    );
}
