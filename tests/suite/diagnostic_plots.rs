//! The diagnostic plots (`--plots-dir` of `fit` and `population`) and the population report
//! (`cistern report` on a case with a `[population]` table).
//!
//! The SVGs are read back without the writer's code: each panel's frame, its tick labels (the
//! axis mapping, linear or logarithmic, from the first and last labelled tick) and its dots;
//! every dot must be a row of the CSV written beside it (`--diagnostics-out`, `--subjects-out`)
//! mapped through that axis, and every row a dot. The bin medians and the QQ plot's positions
//! are checked against numpy and scipy (tests/reference/plots/reference.py and its values).
//! The report is rendered with poppler: every page is inked, every figure page has its plots
//! drawn, the sections are there and the caution is on every page. R's theophylline data
//! (tests/reference/population/theoph; R's datasets documentation, ?Theoph) are the study.

use crate::common::{
    Ran, assert_rel, cistern_at, count_pixels, decode_png, page_texts, poppler_available, render_pages,
    squeeze,
};
use serde_json::Value;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

fn manifest() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn theoph() -> PathBuf {
    manifest().join("tests/reference/population/theoph")
}

/// The fixed creation time (2025-03-01T14:05:09Z).
const EPOCH: &str = "1740837909";

fn run(dir: &Path, args: &[&str]) -> Ran {
    let ran = cistern_at(dir, args, EPOCH);
    assert_eq!(ran.code, 0, "cistern {args:?} failed:\n{}", ran.stderr);
    ran
}

/// A CSV file as rows of named cells (comment lines skipped).
fn csv(path: &Path) -> Vec<HashMap<String, String>> {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines().filter(|l| !l.starts_with('#'));
    let header: Vec<String> = lines.next().unwrap().split(',').map(String::from).collect();
    lines.map(|l| header.iter().cloned().zip(l.split(',').map(String::from)).collect()).collect()
}

fn number(row: &HashMap<String, String>, key: &str) -> Option<f64> {
    row.get(key).filter(|v| !v.is_empty()).map(|v| v.parse().unwrap())
}

/// The value of attribute `name` in an SVG tag.
fn attr(tag: &str, name: &str) -> Option<String> {
    let at = tag.find(&format!(" {name}=\""))? + name.len() + 3;
    Some(tag[at..].split('"').next()?.to_string())
}

/// One panel of an SVG read back: its frame, its axis mappings and its dots.
#[derive(Debug)]
struct Panel {
    /// (value, position) of the labelled ticks, along x and along y.
    x_ticks: Vec<(f64, f64)>,
    y_ticks: Vec<(f64, f64)>,
    dots: Vec<(f64, f64)>,
}

impl Panel {
    /// Where `v` lies on an axis given by its ticks (log when asked).
    fn position(ticks: &[(f64, f64)], v: f64, log: bool) -> f64 {
        let (a, b) = (ticks[0], ticks[ticks.len() - 1]);
        let t = |x: f64| if log { x.log10() } else { x };
        a.1 + (t(v) - t(a.0)) / (t(b.0) - t(a.0)) * (b.1 - a.1)
    }

    /// Checks that the dots are exactly `points` (data values) mapped through the axes.
    fn assert_dots(&self, points: &[(f64, f64)], log: bool, what: &str) {
        assert_eq!(self.dots.len(), points.len(), "{what}: dots and rows");
        let mut unused = self.dots.clone();
        for &(x, y) in points {
            let want = (Self::position(&self.x_ticks, x, log), Self::position(&self.y_ticks, y, log));
            let found =
                unused.iter().position(|d| (d.0 - want.0).abs() < 0.03 && (d.1 - want.1).abs() < 0.03);
            let i = found.unwrap_or_else(|| panic!("{what}: no dot at {want:?} for ({x}, {y})"));
            unused.swap_remove(i);
        }
    }
}

/// The panels of an SVG, in drawing order: each frame with the tick labels along its bottom
/// and left edges and the dots inside it (legend dots lie outside every frame).
fn panels(svg: &str) -> Vec<Panel> {
    let tags: Vec<&str> = svg.split('<').skip(1).collect();
    let mut frames = Vec::new();
    for t in &tags {
        if t.starts_with("path class=\"frame\"") {
            let d = attr(t, "d").unwrap();
            let v: Vec<f64> =
                d.replace(['M', 'L'], " ").split_whitespace().map(|s| s.parse().unwrap()).collect();
            frames.push((v[0], v[1], v[4], v[5]));
        }
    }
    // Each figure is written alone, in one group at the origin, so positions are absolute.
    let mut texts = Vec::new();
    let mut dots = Vec::new();
    for t in &tags {
        if t.starts_with("text ") {
            let (x, y): (f64, f64) =
                (attr(t, "x").unwrap().parse().unwrap(), attr(t, "y").unwrap().parse().unwrap());
            let label = t.split_once('>').unwrap().1.to_string();
            texts.push((x, y, attr(t, "text-anchor"), label));
        }
        if t.starts_with("circle ") {
            dots.push((
                attr(t, "cx").unwrap().parse::<f64>().unwrap(),
                attr(t, "cy").unwrap().parse::<f64>().unwrap(),
            ));
        }
    }
    frames
        .into_iter()
        .map(|(x0, y0, x1, y1)| {
            let eps = 1e-6;
            let inside =
                |&(x, y): &(f64, f64)| x >= x0 - eps && x <= x1 + eps && y >= y0 - eps && y <= y1 + eps;
            let mut x_ticks: Vec<(f64, f64)> = texts
                .iter()
                .filter(|t| t.2.as_deref() == Some("middle") && (t.1 - (y1 + 12.0)).abs() < 0.02)
                .filter(|t| t.0 >= x0 - eps && t.0 <= x1 + eps)
                .filter_map(|t| Some((t.3.parse().ok()?, t.0)))
                .collect();
            let mut y_ticks: Vec<(f64, f64)> = texts
                .iter()
                .filter(|t| t.2.as_deref() == Some("end") && (t.0 - (x0 - 5.0)).abs() < 0.02)
                .filter(|t| t.1 - 2.8 >= y0 - 0.02 && t.1 - 2.8 <= y1 + 0.02)
                .filter_map(|t| Some((t.3.parse().ok()?, t.1 - 2.8)))
                .collect();
            x_ticks.sort_by(|a, b| a.1.total_cmp(&b.1));
            y_ticks.sort_by(|a, b| b.1.total_cmp(&a.1));
            Panel { x_ticks, y_ticks, dots: dots.iter().copied().filter(inside).collect() }
        })
        .collect()
}

fn reference() -> Value {
    let text = std::fs::read_to_string(manifest().join("tests/reference/plots/values.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

#[test]
fn bin_medians_and_normal_scores_match_numpy_and_scipy() {
    use cistern::diagnostics::plots::{bin_medians, normal_scores};
    let r = reference();
    for s in r["scatters"].as_array().unwrap() {
        let points: Vec<(f64, f64)> = floats(&s["x"]).into_iter().zip(floats(&s["y"])).collect();
        let got = bin_medians(&points);
        let want: Vec<Vec<f64>> = s["medians"].as_array().unwrap().iter().map(floats).collect();
        assert_eq!(got.len(), want.len(), "bins for n = {}", points.len());
        for (g, w) in got.iter().zip(&want) {
            assert_rel(g.0, w[0], 1e-14, 1e-14, "bin median of x");
            assert_rel(g.1, w[1], 1e-14, 1e-14, "bin median of y");
        }
    }
    for (n, want) in r["normal_scores"].as_object().unwrap() {
        let got = normal_scores(n.parse().unwrap());
        let want = floats(want);
        assert_eq!(got.len(), want.len());
        for (g, w) in got.iter().zip(&want) {
            assert_rel(*g, *w, 1e-12, 1e-12, &format!("normal score, n = {n}"));
        }
    }
}

/// `population` on the theophylline data (Laplace, for speed) with every output beside the plots.
fn population_outputs(dir: &Path) -> Ran {
    let r = theoph();
    let path = |f: &str| r.join(f).to_string_lossy().into_owned();
    let (model, doses, levels, covariates) =
        (path("start_model.toml"), path("doses.csv"), path("levels.csv"), path("covariates.csv"));
    run(
        dir,
        &[
            "population",
            "--model",
            &model,
            "--doses",
            &doses,
            "--levels",
            &levels,
            "--covariates",
            &covariates,
            "--method",
            "laplace",
            "--diagnostics-out",
            "diagnostics.csv",
            "--subjects-out",
            "subjects.csv",
            "--plots-dir",
            "plots",
            "-o",
            "estimates.csv",
        ],
    )
}

#[test]
fn population_plots_match_the_diagnostics_and_subjects_csv() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join("plots")).unwrap();
    population_outputs(dir.path());
    let svg = |name: &str| std::fs::read_to_string(dir.path().join("plots").join(name)).unwrap();
    let rows = csv(&dir.path().join("diagnostics.csv"));
    let quantified: Vec<&HashMap<String, String>> = rows.iter().filter(|r| r["blq"] == "false").collect();
    let pairs = |x: &str, y: &str| -> Vec<(f64, f64)> {
        rows.iter().filter_map(|r| Some((number(r, x)?, number(r, y)?))).collect()
    };
    for name in cistern::diagnostics::plots::FILES {
        let text = svg(name);
        assert!(text.starts_with("<svg") && text.trim_end().ends_with("</svg>"), "{name}");
        assert!(text.contains("Not clinical advice"), "{name}: the caution");
    }

    // Observed against PRED and IPRED, linear and log: every quantified level in each.
    let p = panels(&svg("observed-vs-predicted.svg"));
    assert_eq!(p.len(), 4);
    for (i, (key, log)) in
        [("pred_mg_l", false), ("pred_mg_l", true), ("ipred_mg_l", false), ("ipred_mg_l", true)]
            .into_iter()
            .enumerate()
    {
        // A log scale cannot show zero (the pre-dose levels and their predictions).
        let points: Vec<(f64, f64)> = quantified
            .iter()
            .map(|r| (number(r, key).unwrap(), number(r, "observed_mg_l").unwrap()))
            .filter(|p| !log || (p.0 > 0.0 && p.1 > 0.0))
            .collect();
        assert!(points.len() >= 120, "{}", points.len());
        p[i].assert_dots(&points, log, &format!("observed against {key}, log {log}"));
    }
    // CWRES against time and against PRED.
    let p = panels(&svg("cwres-vs-time.svg"));
    p[0].assert_dots(&pairs("time_h", "cwres"), false, "CWRES against time");
    let p = panels(&svg("cwres-vs-prediction.svg"));
    p[0].assert_dots(&pairs("pred_mg_l", "cwres"), false, "CWRES against PRED");
    // The QQ plot: the sorted NPDE against scipy's normal quantiles at (i − ½)/n.
    let mut npde: Vec<f64> = rows.iter().filter_map(|r| number(r, "npde")).collect();
    npde.sort_by(f64::total_cmp);
    let scores = floats(&reference()["normal_scores"][npde.len().to_string()]);
    let p = panels(&svg("npde-qq.svg"));
    p[0].assert_dots(&scores.into_iter().zip(npde).collect::<Vec<_>>(), false, "NPDE QQ plot");

    // Individual fits: one panel per subject, its levels as dots.
    let p = panels(&svg("individual-fits.svg"));
    let subjects: Vec<String> = {
        let mut s: Vec<String> = rows.iter().map(|r| r["subject"].clone()).collect();
        s.dedup();
        s
    };
    assert_eq!(p.len(), subjects.len());
    for (panel, subject) in p.iter().zip(&subjects) {
        let levels: Vec<(f64, f64)> = rows
            .iter()
            .filter(|r| &r["subject"] == subject)
            .map(|r| (number(r, "time_h").unwrap(), number(r, "observed_mg_l").unwrap()))
            .collect();
        panel.assert_dots(&levels, false, &format!("levels of {subject}"));
    }

    // Random effects against weight: η = ln(estimate / typical) from --subjects-out.
    let fits = csv(&dir.path().join("subjects.csv"));
    let weights: HashMap<String, f64> = csv(&theoph().join("covariates.csv"))
        .iter()
        .map(|r| (r["subject"].clone(), number(r, "weight_kg").unwrap()))
        .collect();
    let p = panels(&svg("random-effects-vs-covariates.svg"));
    let effects = ["cl_l_h", "v_l", "ka_per_h"];
    assert_eq!(p.len(), effects.len(), "one panel per random effect (weight is the one covariate)");
    for (panel, key) in p.iter().zip(effects) {
        let points: Vec<(f64, f64)> = fits
            .iter()
            .map(|r| {
                let eta = (number(r, key).unwrap() / number(r, &format!("{key}_typical")).unwrap()).ln();
                (weights[&r["subject"]], eta)
            })
            .collect();
        panel.assert_dots(&points, false, &format!("η of {key} against weight"));
    }
}

#[test]
fn fit_plots_dir_writes_what_there_is_and_refuses_a_missing_directory() {
    let demo = manifest().join("demo-regimens");
    let path = |f: &str| demo.join(f).to_string_lossy().into_owned();
    let (model, doses, levels, covariates) =
        (path("model.toml"), path("doses.csv"), path("levels.csv"), path("covariates.csv"));
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join("map")).unwrap();
    std::fs::create_dir(dir.path().join("wls")).unwrap();
    let study = ["--doses", &doses, "--levels", &levels, "--covariates", &covariates];
    let mut args =
        vec!["fit", "--model", &model, "--intervals", "laplace", "--plots-dir", "map", "-o", "fit.csv"];
    args.extend(study);
    run(dir.path(), &args);
    let written = |d: &str| {
        let mut names: Vec<String> = std::fs::read_dir(dir.path().join(d))
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        names
    };
    let mut all: Vec<String> = cistern::diagnostics::plots::FILES.iter().map(|s| s.to_string()).collect();
    all.sort();
    assert_eq!(written("map"), all);
    // Without a model: no PRED, CWRES, NPDE or random effects, so only two plots, and a note.
    let mut args =
        vec!["fit", "--method", "wls", "--ka", "1.1", "--f", "0.8", "--plots-dir", "wls", "-o", "wls.csv"];
    args.extend(study);
    let ran = run(dir.path(), &args);
    assert_eq!(written("wls"), ["individual-fits.svg", "observed-vs-predicted.svg"]);
    assert!(ran.stderr.contains("nothing to draw for cwres-vs-time.svg"), "{}", ran.stderr);
    // A directory that does not exist: exit 2, the flag named, nothing written.
    let mut args = vec!["fit", "--model", &model, "--plots-dir", "no/such/dir", "-o", "none.csv"];
    args.extend(study);
    let ran = cistern_at(dir.path(), &args, EPOCH);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("--plots-dir") && ran.stderr.contains("no/such/dir"), "{}", ran.stderr);
    assert!(!dir.path().join("none.csv").exists());
}

/// The population report of tests/cases/population-report.toml, written into `dir`.
fn population_report(dir: &Path, out: &str) -> Vec<u8> {
    let case = manifest().join("tests/cases/population-report.toml");
    run(dir, &["report", &case.to_string_lossy(), "-o", out]);
    std::fs::read(dir.join(out)).unwrap()
}

#[test]
fn population_report_has_its_sections_plots_and_caution_on_every_page() {
    let (dir, again) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let pdf = population_report(dir.path(), "report.pdf");
    // The same inputs, command and creation time give the same bytes.
    assert!(pdf == population_report(again.path(), "report.pdf"), "the report is not reproducible");
    let pages = page_texts(&pdf);
    let all = squeeze(&pages.concat());
    for section in [
        "Data",
        "Subjects12",
        "Levels132",
        "Belowthequantificationlimit0(0.0%)",
        "Doseroutesoral:12",
        "Modelandestimation",
        "Parameterestimates",
        "RSE(%)",
        "95%interval",
        "shrinkage(%)",
        "Objective",
        "-2log-likelihood",
        "Warnings",
        "Diagnosticplots",
        "Observedagainstpredictedconcentrations",
        "CWRESagainsttime",
        "CWRESagainstthepopulationprediction",
        "NormalQQplotoftheNPDE",
        "Individualfits",
        "Randomeffectsagainstcovariates",
        "Visualpredictivecheck(500replicates)",
        "Methodsandreferences",
        "Reproducibility",
        "SHA-256",
    ] {
        assert!(all.contains(section), "the report lacks {section:?}");
    }
    for (i, text) in pages.iter().enumerate() {
        assert!(squeeze(text).contains("Notclinicaladvice"), "page {} lacks the caution", i + 1);
    }
    if !poppler_available() {
        return;
    }
    let pngs = render_pages(&dir.path().join("report.pdf"), dir.path(), 50);
    assert_eq!(pngs.len(), pages.len());
    for (i, png) in pngs.iter().enumerate() {
        let img = decode_png(png);
        // The body (below the banner, above the footer) is inked on every page.
        let (_, inked) = count_pixels(&img, (50.0, 90.0, 545.0, 790.0), 50.0);
        assert!(inked > 500, "page {} is blank ({inked} inked pixels)", i + 1);
        // A page of plots has its dots and lines drawn, and the coloured curves (individual
        // fits) and bin medians (CWRES) in colour.
        let plots =
            ["CWRES against", "Individual fits", "Observed against", "Random effects", "Visual predictive"];
        if plots.iter().any(|t| pages[i].contains(t)) {
            assert!(inked > 5000, "page {}: the plots are not drawn ({inked} inked pixels)", i + 1);
        }
        if plots[..2].iter().any(|t| pages[i].contains(t)) {
            let (coloured, _) = count_pixels(&img, (50.0, 90.0, 545.0, 790.0), 50.0);
            assert!(coloured > 50, "page {}: the curves are not drawn ({coloured} coloured pixels)", i + 1);
        }
    }
}

#[test]
fn a_bad_population_table_is_refused_at_its_keys_with_nothing_written() {
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(manifest().join("tests/cases/population-report.toml")).unwrap();
    let inputs = theoph().to_string_lossy().into_owned();
    let text = text.replace("../reference/population/theoph", &inputs);
    let bad = text.replace("method = \"laplace\"", "method = \"newton\"\nnodes = 99");
    std::fs::write(dir.path().join("bad.toml"), bad).unwrap();
    let ran = cistern_at(dir.path(), &["report", "bad.toml", "-o", "bad.pdf"], EPOCH);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    // Both problems at once, each at its key and line.
    assert!(ran.stderr.contains("key population.method") && ran.stderr.contains("newton"), "{}", ran.stderr);
    assert!(ran.stderr.contains("key population.nodes") && ran.stderr.contains("99"), "{}", ran.stderr);
    assert!(ran.stderr.contains("line "), "{}", ran.stderr);
    assert!(!dir.path().join("bad.pdf").exists());
    // One subject's settings do not apply to a population report.
    std::fs::write(dir.path().join("good.toml"), text).unwrap();
    let ran = cistern_at(dir.path(), &["report", "good.toml", "--subject", "1", "-o", "good.pdf"], EPOCH);
    assert_eq!(ran.code, 2, "{}", ran.stderr);
    assert!(ran.stderr.contains("--subject"), "{}", ran.stderr);
    assert!(!dir.path().join("good.pdf").exists());
}
