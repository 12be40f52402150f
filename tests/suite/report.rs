//! `cistern report` on the demo case (`demo-regimens/p01.toml`, an invented scenario), run as a
//! real process in a copy of `demo-regimens/`, and the PDF checked with tools that share no code
//! with the writer: lopdf (page count and text), poppler's `pdfinfo` (opens without errors),
//! `pdftotext -bbox` and `pdftoppm` (the pages and the plots are drawn, not blank).
//!
//! The report's numbers are compared with the JSON of `cistern plan --case` and
//! `cistern sweep --case` for the same case and seed, as printed text: each expected string is
//! formatted here from the JSON numbers by the report's stated rule (3 significant digits for
//! exposures, one decimal for percentages), so a report that rounds, swaps or mislabels a
//! number does not pass.
//!
//! Without poppler the poppler checks are skipped with a message, unless
//! `CISTERN_REQUIRE_POPPLER=1`, which makes them mandatory (CI sets it).

use crate::common::{
    Ran, cistern_at, count_pixels, decode_png, demo_copy, find, find_all, page_texts, poppler_available,
    render_pages, squeeze, words,
};
use cistern::io::output::{column_decimals, fixed};
use serde_json::Value;
use sha2::{Digest, Sha256};
use std::path::Path;
use std::process::Command;

/// The fixed creation time: 1740837909 s after the epoch is 2025-03-01T14:05:09Z (an exact
/// calendar identity; `date -u -d @1740837909` prints the same).
const EPOCH: &str = "1740837909";
const CREATED: &str = "2025-03-01T14:05:09Z";
/// A4 width in points (210 mm).
const PAGE_W: f64 = 595.276;

fn run(dir: &Path, args: &[&str]) -> Ran {
    let ran = cistern_at(dir, args, EPOCH);
    assert_eq!(ran.code, 0, "cistern {args:?} failed:\n{}", ran.stderr);
    ran
}

/// The demo's report, written in a fresh copy of the demo directory.
fn report(extra: &[&str]) -> (tempfile::TempDir, Vec<u8>) {
    let dir = demo_copy();
    let mut args = vec!["report", "p01.toml", "-o", "out.pdf"];
    args.extend_from_slice(extra);
    run(dir.path(), &args);
    let pdf = std::fs::read(dir.path().join("out.pdf")).expect("the report was written");
    (dir, pdf)
}

fn json(dir: &Path, args: &[&str]) -> Value {
    serde_json::from_str(&run(dir, args).stdout).expect("JSON on stdout")
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// `x` with `digits` significant digits in fixed notation, never dropping digits of the integer
/// part (1234.56 to 3 digits is 1235): the report's stated format for measured quantities.
/// The decimals come from the exponent of the rounded scientific form.
fn sig(x: f64, digits: usize) -> String {
    let sci = format!("{:.*e}", digits - 1, x);
    let exponent: i32 = sci.rsplit('e').next().unwrap().parse().unwrap();
    let decimals = (digits as i32 - 1 - exponent).max(0) as usize;
    format!("{x:.decimals$}")
}

/// A probability as a percentage with one decimal.
fn pct(p: f64) -> String {
    format!("{:.1}", 100.0 * p)
}

/// Median with the 90 % interval, as the recommendation block prints a band.
fn band(b: &Value) -> String {
    format!("{} ({} – {})", sig(num(&b["median"]), 3), sig(num(&b["p05"]), 3), sig(num(&b["p95"]), 3))
}

/// A regimen as written on a prescription (amounts and times are exact in the JSON).
fn regimen(c: &Value) -> String {
    let over = match num(&c["duration_h"]) {
        d if d > 0.0 => format!(" over {d} h"),
        _ => String::new(),
    };
    format!(
        "{} mg {}{over} every {} h",
        num(&c["amount_mg"]),
        c["route"].as_str().unwrap(),
        num(&c["every_h"])
    )
}

#[test]
fn every_page_carries_the_caution_and_the_footer() {
    let (_dir, pdf) = report(&[]);
    let pages = page_texts(&pdf);
    let m = pages.len();
    assert!(m >= 3, "only {m} pages");
    let footer = squeeze(&format!("cistern {} · created {CREATED}", env!("CARGO_PKG_VERSION")));
    for (i, text) in pages.iter().enumerate() {
        let flat = squeeze(text);
        for phrase in
            ["CAUTION", "Not clinical advice", "licensed clinicians", "local protocols", "product labelling"]
        {
            assert!(flat.contains(&squeeze(phrase)), "page {}: no '{phrase}' in {text:?}", i + 1);
        }
        assert!(flat.contains(&squeeze(&format!("page {} of {m}", i + 1))), "page {}: no page number", i + 1);
        assert!(flat.contains(&footer), "page {}: no footer with version and creation time", i + 1);
    }
}

#[test]
fn the_report_prints_the_numbers_of_plan_and_sweep() {
    let (dir, pdf) = report(&[]);
    let text = squeeze(&page_texts(&pdf).concat());
    let has = |what: &str, s: &str| assert!(text.contains(&squeeze(s)), "{what}: '{s}' not in the report");
    let plan = json(dir.path(), &["plan", "--case", "p01.toml", "--format", "json"]);

    // The recommendation block: each label followed by its value.
    let rec = &plan["recommended"];
    assert!(rec.is_object(), "the demo case recommends a regimen: {plan}");
    let p = &rec["predicted"];
    has("regimen", &format!("Regimen {}", regimen(rec)));
    has("start", &format!("First dose at {} h", sig(num(&rec["start_h"]), 5)));
    has("PTA", &format!("Probability of target attainment {} %", pct(num(&rec["pta"]))));
    has("peak", &format!("Predicted peak, mg/L (90 %) {}", band(&p["peak_mg_l"])));
    has("trough", &format!("Predicted trough, mg/L (90 %) {}", band(&p["trough_mg_l"])));
    has("AUC24", &format!("Predicted AUC24, mg·h/L (90 %) {}", band(&p["auc24_mg_h_l"])));
    has("peak risk", &format!("Chance the peak exceeds its limit {} %", pct(num(&rec["p_over_peak"]))));
    has("trough risk", &format!("Chance the trough exceeds its limit {} %", pct(num(&rec["p_over_trough"]))));
    match rec["loading_dose_mg"].as_f64() {
        Some(ld) => has("loading dose", &format!("Loading dose {ld} mg as the first dose")),
        None => assert!(!text.contains("Loadingdose"), "a loading dose printed where the plan has none"),
    }

    // The alternatives table, row by row in the plan's order: rank, regimen, PTA and medians.
    let candidates = plan["candidates"].as_array().unwrap();
    assert!(candidates.len() >= 12, "{} candidates", candidates.len());
    // Each column with one number of decimals, chosen for the column (issue 10).
    let shown = &candidates[..12];
    let median = |c: &serde_json::Value, m: &str| num(&c["predicted"][m]["median"]);
    let decimals = ["peak_mg_l", "trough_mg_l", "auc24_mg_h_l"]
        .map(|m| cistern::io::output::column_decimals(shown.iter().map(|c| median(c, m)), 3));
    for (i, c) in shown.iter().enumerate() {
        let cell = |m: &str, d: usize| format!("{:.d$}", median(c, m));
        let row = format!(
            "{} {} {} {} {} {}",
            i + 1,
            regimen(c),
            pct(num(&c["pta"])),
            cell("peak_mg_l", decimals[0]),
            cell("trough_mg_l", decimals[1]),
            cell("auc24_mg_h_l", decimals[2])
        );
        has(&format!("alternative {}", i + 1), &row);
        for why in c["limits_broken"].as_array().unwrap() {
            has(&format!("alternative {}: broken limit", i + 1), why.as_str().unwrap());
        }
    }

    // The next-level advice: the exposure, its current width and the best sampling time.
    let advice = &plan["next_level"];
    has(
        "advice",
        &format!(
            "the 90 % interval of {} (now {} {} wide)",
            cistern::io::labels::name_and_unit(advice["exposure"].as_str().unwrap()).0,
            sig(num(&advice["current_ci90_width"]), 3),
            cistern::io::labels::name_and_unit(advice["exposure"].as_str().unwrap()).1
        ),
    );
    let times: Vec<&Value> = advice["times"].as_array().unwrap().iter().take(6).collect();
    let best = times[0];
    let in_column = |key: &str, digits: usize| {
        let d = cistern::io::output::column_decimals(times.iter().map(|t| num(&t[key])), digits);
        format!("{:.d$}", num(&best[key]))
    };
    has(
        "best sampling time",
        &format!(
            "{} {} {} {:.0} %",
            in_column("time_h", 5),
            in_column("after_dose_h", 3),
            in_column("expected_ci90_width", 3),
            num(&best["interval_narrowing_pct"])
        ),
    );

    // The sweep page lists the case's sweep (same model, pool, subjects and seed), ranked by
    // PTA and then daily dose: the top rows with their percentiles.
    let sweep = json(dir.path(), &["sweep", "--case", "p01.toml", "--format", "json"]);
    has("sweep size", &format!("Virtual population: {} subjects", num(&sweep["subjects"])));
    let mut rows: Vec<&Value> = sweep["regimens"].as_array().unwrap().iter().collect();
    rows.sort_by(|a, b| {
        num(&b["pta"]).total_cmp(&num(&a["pta"])).then(num(&a["daily_mg"]).total_cmp(&num(&b["daily_mg"])))
    });
    for r in rows.iter().take(5) {
        let broken = !r["dose_limits_broken"].as_array().unwrap().is_empty()
            || !r["exposure_limits_broken"].as_array().unwrap().is_empty();
        // Each column's decimals are chosen over the rows the page shows (at most 20).
        let q = |m: &str, p: &str| {
            let d = cistern::io::output::column_decimals(rows.iter().take(20).map(|o| num(&o[m][p])), 3);
            format!("{:.d$}", num(&r[m][p]))
        };
        has(
            "sweep row",
            &format!(
                "{} mg {} over {} h every {} h{} {} {} {} {} {} {} {} {}",
                num(&r["amount_mg"]),
                r["route"].as_str().unwrap(),
                num(&r["duration_h"]),
                num(&r["every_h"]),
                if broken { " *" } else { "" },
                pct(num(&r["pta"])),
                q("trough_mg_l", "p05"),
                q("trough_mg_l", "p50"),
                q("trough_mg_l", "p95"),
                q("peak_mg_l", "p50"),
                q("auc24_mg_h_l", "p05"),
                q("auc24_mg_h_l", "p50"),
                q("auc24_mg_h_l", "p95")
            ),
        );
    }

    // The reproducibility block: each input file with its SHA-256 (computed here by the
    // `sha2` crate), and the seed of the case.
    for name in ["p01.toml", "model.toml", "doses.csv", "levels.csv", "covariates.csv", "population.csv"] {
        let digest: String = Sha256::digest(std::fs::read(dir.path().join(name)).unwrap())
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect();
        has("digest", &format!("{name} {digest}"));
    }
    has("seed", "Seed 7");
}

#[test]
fn the_same_case_and_clock_give_the_same_bytes() {
    let (dir, first) = report(&[]);
    std::fs::remove_file(dir.path().join("out.pdf")).unwrap();
    run(dir.path(), &["report", "p01.toml", "-o", "out.pdf"]);
    let second = std::fs::read(dir.path().join("out.pdf")).unwrap();
    assert!(first == second, "two runs with SOURCE_DATE_EPOCH={EPOCH} differ");
    // The clock is what SOURCE_DATE_EPOCH says: one day later (86400 s) is the next date.
    let later = cistern_at(dir.path(), &["report", "p01.toml", "-o", "later.pdf"], "1740924309");
    assert_eq!(later.code, 0, "{}", later.stderr);
    let later = page_texts(&std::fs::read(dir.path().join("later.pdf")).unwrap());
    assert!(later.iter().all(|t| t.contains("created 2025-03-02T14:05:09Z")), "{:?}", later[0]);
}

#[test]
fn svg_export_has_the_axis_labels() {
    let (dir, _) = report(&["--svg", "curve.svg"]);
    let svg = std::fs::read_to_string(dir.path().join("curve.svg")).expect("the SVG was written");
    assert!(svg.starts_with("<svg ") && svg.trim_end().ends_with("</svg>"), "not an SVG document");
    // Both panels (linear and logarithmic) label both axes; each has its own title.
    for (label, times) in [
        ("time (h)", 2),
        ("concentration (mg/L)", 2),
        ("Concentration, linear scale", 1),
        ("Concentration, logarithmic scale", 1),
    ] {
        assert_eq!(svg.matches(&format!(">{label}</text>")).count(), times, "{label}");
    }
}

#[test]
fn poppler_opens_the_report_and_its_pages_and_plots_are_drawn() {
    if !poppler_available() {
        return;
    }
    let (dir, pdf) = report(&[]);
    let path = dir.path().join("out.pdf");
    let m = page_texts(&pdf).len();
    let info = Command::new("pdfinfo").arg(&path).output().unwrap();
    assert!(info.status.success(), "pdfinfo: {}", String::from_utf8_lossy(&info.stderr));
    let info = String::from_utf8_lossy(&info.stdout).into_owned();
    assert!(info.lines().any(|l| l.split_whitespace().eq(["Pages:".to_string(), m.to_string()])), "{info}");

    const DPI: f64 = 50.0;
    let pngs = render_pages(&path, dir.path(), DPI as u32);
    assert_eq!(pngs.len(), m);
    // Every page has ink between its caution banner and its footer.
    for (i, png) in pngs.iter().enumerate() {
        let w = words(&path, i + 1);
        let banner = find(&w, "product labelling.").unwrap_or_else(|| panic!("page {}: no banner", i + 1));
        let footer = find(&w, &format!("page {} of {m}", i + 1)).unwrap();
        let body = (0.0, banner.3 + 12.0, PAGE_W, footer.1 - 8.0);
        let (_, inked) = count_pixels(&decode_png(png), body, DPI);
        let total = ((body.2 - body.0) * (body.3 - body.1) * (DPI / 72.0).powi(2)) as usize;
        assert!(inked > total / 200, "page {}: {inked} inked pixels of {total} in the body", i + 1);
    }
    // The two concentration panels: between a panel's title and its x-axis label lies the
    // data area, where the band, the curve, the target stripe and the levels are coloured.
    let mut panels = 0;
    for page in 1..=m {
        let w = words(&path, page);
        for title in ["Concentration, linear scale", "Concentration, logarithmic scale"] {
            let Some(t) = find(&w, title) else { continue };
            panels += 1;
            let axis = find_all(&w, "time (h)")
                .into_iter()
                .find(|a| a.1 > t.3)
                .expect("an x-axis label below the title");
            assert!(axis.1 > t.3 + 100.0, "{title}: panel from {} to {}", t.3, axis.1);
            let area = (t.0, t.3, PAGE_W - t.0, axis.1 - 12.0);
            let (coloured, inked) = count_pixels(&decode_png(&pngs[page - 1]), area, DPI);
            let total = ((area.2 - area.0) * (area.3 - area.1) * (DPI / 72.0).powi(2)) as usize;
            assert!(coloured > total / 20, "{title}: {coloured} coloured pixels of {total}");
            assert!(inked > total / 10, "{title}: {inked} inked pixels of {total}");
        }
    }
    assert_eq!(panels, 2, "both concentration panels are in the report");
}

/// The PDF's metadata names the case's author (`[report] author` in p01.toml), as lopdf (an
/// independent reader) reads the document information dictionary.
#[test]
fn the_pdf_author_field_is_the_case_author() {
    let (_dir, pdf) = report(&[]);
    let doc = lopdf::Document::load_mem(&pdf).expect("lopdf parses the PDF");
    let info = doc.trailer.get(b"Info").and_then(|o| o.as_reference()).expect("an Info dictionary");
    let info = doc.get_object(info).and_then(|o| o.as_dict()).expect("the Info dictionary");
    let author = info.get(b"Author").and_then(|a| a.as_str()).expect("an Author entry");
    // A PDF text string is UTF-16BE after a byte-order mark, or PDFDocEncoding (ASCII here).
    let author = match author.strip_prefix(&[0xFE, 0xFF]) {
        Some(utf16) => String::from_utf16(
            &utf16.chunks(2).map(|b| u16::from_be_bytes([b[0], b[1]])).collect::<Vec<u16>>(),
        )
        .expect("UTF-16"),
        None => String::from_utf8(author.to_vec()).expect("ASCII"),
    };
    assert_eq!(author, "cistern demonstration");
}

/// The sweep page says how many of the swept regimens it shows, and each starred regimen has
/// a note saying which limits it breaks (the reasons of the sweep's JSON).
#[test]
fn the_sweep_page_says_what_it_shows_and_why_a_regimen_is_starred() {
    let (dir, pdf) = report(&[]);
    let text = squeeze(&page_texts(&pdf).concat());
    let sweep = json(dir.path(), &["sweep", "--case", "p01.toml", "--format", "json"]);
    let all = sweep["regimens"].as_array().unwrap();
    assert!(all.len() > 20, "the demo sweeps more regimens than the page shows");
    assert!(text.contains(&squeeze(&format!("the best 20 of {} regimens", all.len()))), "no count");
    let mut rows: Vec<&Value> = all.iter().collect();
    rows.sort_by(|a, b| {
        num(&b["pta"]).total_cmp(&num(&a["pta"])).then(num(&a["daily_mg"]).total_cmp(&num(&b["daily_mg"])))
    });
    let mut starred = 0;
    for r in rows.iter().take(20) {
        let reasons: Vec<&str> = ["dose_limits_broken", "exposure_limits_broken"]
            .iter()
            .flat_map(|k| r[*k].as_array().unwrap().iter().map(|m| m.as_str().unwrap()))
            .collect();
        if !reasons.is_empty() {
            starred += 1;
            let note = format!("* {}: {}.", regimen(r), reasons.join("; "));
            assert!(text.contains(&squeeze(&note)), "'{note}' not in the report");
        }
    }
    assert!(starred > 0, "the demo's sweep page has starred regimens");
}

/// The report's concentration plot sampled 400 evenly spaced times, so an infusion's end (the
/// peak of the exact curve) fell between two of them and the plot was cut below the peak. It
/// now samples where `simulate --svg` does (every dose start and infusion end): the highest
/// point of the individual prediction is the engine's concentration at the end of the highest
/// infusion, the true maximum of a one-compartment curve under infusions.
#[test]
fn the_report_plot_reaches_the_exact_infusion_peak() {
    use cistern::plan::Course;
    use cistern::workflow::plan::plan_settings;
    use cistern::workflow::report::{Provenance, report};
    use cistern::workflow::{NextLevel, PlanSubject, Required, Study, plan};

    let case = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-regimens/p01.toml");
    let mut spec = cistern::case::read(case.to_str().unwrap()).unwrap();
    spec.draws.value = Some(200);
    spec.sweep = None;
    let provenance = Provenance { command_line: "test".into(), created_iso: CREATED.into() };
    let made = report(&spec, provenance).unwrap();
    let prediction = &made.plots[0].series[0];
    assert_eq!(prediction.label, "individual prediction");
    let plotted = prediction.ys.iter().copied().fold(f64::NEG_INFINITY, f64::max);

    // The same subject and plan through the library, and the engine at every infusion's end.
    let study = Study::load(&spec.inputs, Required { model: true, levels: false }).unwrap();
    let data = study.subject(&spec.subject).unwrap();
    let seeds = cistern::Seeds(spec.seed());
    let (subject, _) = PlanSubject::of(data, study.model.as_ref().unwrap(), seeds, 200).unwrap();
    let settings = plan_settings(&spec, Some(&subject)).unwrap();
    let grid = settings.grid.as_ref().unwrap();
    let outcome = plan(&subject, grid, settings.start_h, NextLevel::default(), seeds).unwrap();
    let rec = outcome.plan.recommended.as_ref().expect("the demo recommends a regimen");
    let regimen = &rec.assessment.regimen;
    assert!(regimen.duration_h > 0.0, "the demo's regimen is an infusion");
    let end = rec.start_h + 3.0 * regimen.every_h;
    let course =
        Course { history: &data.doses, start_h: outcome.start_h, therapy_start_h: data.doses[0].time_h };
    let doses = course.continued(regimen, rec.loading_dose_mg, end);
    let ends: Vec<f64> = doses.iter().map(|d| d.time_h + d.duration_h).filter(|&t| t <= end).collect();
    let peak = cistern::engine::concentrations(&subject.posterior.point, &doses, &ends)
        .into_iter()
        .fold(f64::NEG_INFINITY, f64::max);
    crate::common::assert_rel(plotted, peak, 1e-12, 1e-9, "the plotted maximum against the exact peak");
}

/// The NCA rows of `subject` in `cistern nca --format json`, as the report's table prints them:
/// intervals with a measured level only, each column with the decimals of the report's rule
/// (4 significant digits of the column's largest value), a dash where a value is missing.
fn nca_rows(dir: &Path, subject: &str) -> Vec<String> {
    let nca = json(dir, &["nca", "--doses", "doses.csv", "--levels", "levels.csv", "--format", "json"]);
    let measured: Vec<&Value> = nca["subjects"]
        .as_array()
        .expect("subjects[]")
        .iter()
        .filter(|s| s["subject"] == subject && !s["cmax_mg_l"].is_null())
        .collect();
    assert!(!measured.is_empty(), "no measured interval of {subject} in {nca}");
    let keys =
        ["cmax_mg_l", "tmax_h", "auc_last_mg_h_l", "lambda_z_per_h", "half_life_h", "auc_inf_obs_mg_h_l"];
    let columns: Vec<Vec<String>> = keys
        .iter()
        .map(|k| {
            let decimals = column_decimals(measured.iter().filter_map(|s| s[*k].as_f64()), 4);
            measured
                .iter()
                .map(|s| s[*k].as_f64().map_or_else(|| "—".to_string(), |x| fixed(x, decimals)))
                .collect()
        })
        .collect();
    (0..measured.len())
        .map(|i| {
            format!(
                "{} {}",
                measured[i]["interval"],
                columns.iter().map(|c| c[i].as_str()).collect::<Vec<_>>().join(" ")
            )
        })
        .collect()
}

#[test]
fn the_report_gives_the_nca_of_the_demo_subject_and_says_it_has_no_terminal_line() {
    let (dir, pdf) = report(&[]);
    let text = squeeze(&page_texts(&pdf).concat());
    assert!(text.contains(&squeeze("Non-compartmental analysis")), "no NCA section");
    for row in nca_rows(dir.path(), "P01") {
        assert!(text.contains(&squeeze(&row)), "NCA row '{row}' not in the report");
    }
    // P01's levels are one or two per interval: no λz, said so, and no line drawn.
    assert!(text.contains(&squeeze("No interval has the levels a terminal line needs")), "no honest note");
    assert!(text.contains(&squeeze("no lambdaz: 0 measurable level(s) after the peak")), "no λz note");
    assert!(!text.contains(&squeeze("terminal line, slope")), "a terminal line drawn without λz");
}

#[test]
fn the_report_gives_the_nca_table_and_panel_of_a_rich_profile() {
    let dir = demo_copy();
    // Invented levels: P01's first dosing interval sampled richly, the demo's other levels kept.
    let levels = std::fs::read_to_string(dir.path().join("levels.csv")).unwrap();
    let rich =
        "P01,1.0,20.0\nP01,2.0,18.3\nP01,4.0,15.1\nP01,6.0,12.4\nP01,8.0,10.1\nP01,10.0,8.3\nP01,12.0,6.8\n";
    let levels =
        levels.replacen("subject,time_h,conc_mg_l\n", &format!("subject,time_h,conc_mg_l\n{rich}"), 1);
    std::fs::write(dir.path().join("levels.csv"), levels).unwrap();
    run(dir.path(), &["report", "p01.toml", "-o", "out.pdf"]);
    let pdf = std::fs::read(dir.path().join("out.pdf")).expect("the report was written");
    let pages = page_texts(&pdf);
    let text = squeeze(&pages.concat());
    let rows = nca_rows(dir.path(), "P01");
    assert!(
        rows[0].starts_with("1 ") && !rows[0].contains('—'),
        "the first interval has every value: {}",
        rows[0]
    );
    for row in &rows {
        assert!(text.contains(&squeeze(row)), "NCA row '{row}' not in the report");
    }
    // The panel of the first interval: its title, the marked levels and the fitted line.
    for s in ["P01, dose 1", "levels of the terminal line", "terminal line, slope"] {
        assert!(text.contains(&squeeze(s)), "'{s}' not in the report");
    }
    assert!(!text.contains(&squeeze("No interval has the levels a terminal line needs")));
    for (i, page) in pages.iter().enumerate() {
        assert!(squeeze(page).contains("CAUTION"), "page {} has no caution", i + 1);
    }
}
