//! Tables for reading: every command's table fits an 80-column terminal (COLUMNS=80), each
//! column prints its numbers alike, `verify` prints expected and computed values at the same
//! precision, `fit` summarises a study one line per subject, and the outputs that come with a
//! fit or a simulation (`--levels-out`, `--svg`) agree exactly with `simulate`.

use crate::common::{DEMO_STUDY, ONE_REGIMEN, demo_args, demo_copy};
use std::path::Path;
use std::process::Command;

/// What one run printed: (exit code, stdout, stderr).
fn run(dir: &Path, args: &[&str], columns: Option<&str>) -> (i32, String, String) {
    let mut command = Command::new(env!("CARGO_BIN_EXE_cistern"));
    command.args(args).current_dir(dir).env_remove("COLUMNS");
    if let Some(c) = columns {
        command.env("COLUMNS", c);
    }
    let out = command.output().expect("the cistern binary runs");
    let text = |b: Vec<u8>| String::from_utf8(b).expect("UTF-8");
    (out.status.code().expect("an exit code"), text(out.stdout), text(out.stderr))
}

/// The table output of `args` with COLUMNS=80, checked to have no line over 80 characters.
#[track_caller]
fn table_at_80(dir: &Path, args: &[&str]) -> String {
    let mut args = args.to_vec();
    args.extend(["--format", "table"]);
    let (code, out, err) = run(dir, &args, Some("80"));
    assert_eq!(code, 0, "{args:?}: {err}");
    for line in out.lines() {
        assert!(
            line.chars().count() <= 80,
            "{args:?}: a line of {} characters:\n{line}\n\n{out}",
            line.chars().count()
        );
    }
    assert!(out.contains("Not clinical advice"), "{out}");
    out
}

const GRID: [&str; 12] = [
    "--amounts",
    "500..2500/250",
    "--every",
    "8h,12h,24h,36h",
    "--durations",
    "1h,2h",
    "--target",
    "auc24=400..600",
    "--max-peak",
    "60mg/l",
    "--max-trough",
    "20mg/l",
];

#[test]
fn the_sweep_table_fits_80_columns_and_says_what_it_left_out() {
    let dir = demo_copy();
    let mut args =
        vec!["sweep", "--model", "model.toml", "--covariates", "population.csv", "--subjects", "300"];
    args.extend(GRID);
    let out = table_at_80(dir.path(), &args);
    assert!(out.contains("Left out to fit 80 columns"), "{out}");
    assert!(out.contains("PTA") && out.contains("AUC24") && out.contains("(mg·h/L)"), "{out}");
    // No raw keys in the table.
    assert!(!out.contains("auc24_mg_h_l") && !out.contains("pta_%"), "{out}");
    // Without a width (a pipe), every column is there.
    let mut wide = args.clone();
    wide.extend(["--format", "table"]);
    let (_, all, _) = run(dir.path(), &wide, None);
    assert!(!all.contains("Left out") && all.contains("trough over"), "{all}");
}

#[test]
fn the_verify_table_fits_80_columns() {
    let dir = tempfile::tempdir().unwrap();
    table_at_80(dir.path(), &["verify"]);
}

#[test]
fn the_plan_table_fits_80_columns() {
    let dir = demo_copy();
    let mut args = vec!["plan", "--subject", "P01", "--draws", "300"];
    args.extend(DEMO_STUDY);
    args.extend(GRID);
    let out = table_at_80(dir.path(), &args);
    assert!(out.contains("Recommended:") && out.contains("PTA"), "{out}");
}

#[test]
fn the_fit_tables_fit_80_columns() {
    let dir = demo_copy();
    let mut args = vec!["fit", "--draws", "300"];
    args.extend(DEMO_STUDY);
    table_at_80(dir.path(), &args);
    args.push("--details");
    table_at_80(dir.path(), &args);
}

#[test]
fn the_simulate_and_exposure_tables_fit_80_columns() {
    let dir = demo_copy();
    let regimen =
        ["--dose", "1g", "--every", "12h", "--count", "3", "--duration", "1h", "--cl", "4.2", "--v", "48"];
    let mut simulate = vec!["simulate", "--times", "0:36:3"];
    simulate.extend(regimen);
    table_at_80(dir.path(), &simulate);
    table_at_80(
        dir.path(),
        &["simulate", "--doses", "doses.csv", "--cl", "4.2", "--v", "48", "--ka", "1", "--at", "1,6,12"],
    );
    let mut exposure = vec!["exposure"];
    exposure.extend(regimen.iter().copied().filter(|a| !["--count", "3"].contains(a)));
    table_at_80(dir.path(), &exposure);
}

/// The decimals of a number as printed (`12.50` → 2, `500` → 0).
fn decimals(cell: &str) -> Option<usize> {
    cell.parse::<f64>().ok()?;
    Some(cell.split_once('.').map_or(0, |(_, d)| d.len()))
}

#[test]
fn each_column_of_the_sweep_table_prints_its_numbers_with_one_number_of_decimals() {
    let dir = demo_copy();
    let mut args =
        vec!["sweep", "--model", "model.toml", "--covariates", "population.csv", "--subjects", "300"];
    args.extend(GRID);
    args.extend(["--format", "table"]);
    let (code, out, err) = run(dir.path(), &args, None);
    assert_eq!(code, 0, "{err}");
    // The rows: lines that start with the regimen's number.
    let rows: Vec<Vec<&str>> = out
        .lines()
        .map(|l| l.split_whitespace().collect::<Vec<_>>())
        .filter(|cells| cells.first().is_some_and(|c| c.parse::<u32>().is_ok()) && cells.len() > 10)
        .collect();
    assert_eq!(rows.len(), 18 * 4, "{out}");
    let columns = rows.iter().map(Vec::len).min().unwrap();
    for c in 1..columns {
        let found: Vec<usize> = rows.iter().filter_map(|r| decimals(r[c])).collect();
        if found.len() == rows.len() {
            assert!(found.iter().all(|d| *d == found[0]), "column {c}: decimals {found:?}\n{out}");
        }
    }
}

#[test]
fn verify_prints_expected_and_computed_values_at_the_same_precision() {
    let dir = tempfile::tempdir().unwrap();
    let (code, out, err) = run(dir.path(), &["verify", "--format", "table"], None);
    assert_eq!(code, 0, "{err}");
    let mut checked = 0;
    for case in cistern::verify::cases() {
        let line = out.lines().find(|l| l.contains(case.name)).unwrap_or_else(|| panic!("{}", case.name));
        let after = &line[line.find(case.name).unwrap() + case.name.len()..];
        let numbers: Vec<&str> = after.split_whitespace().take(2).collect();
        let (expected, computed) = (decimals(numbers[0]), decimals(numbers[1]));
        assert!(expected.is_some() && expected == computed, "{line}");
        checked += 1;
    }
    assert!(checked > 20);
}

#[test]
fn fit_summarises_a_study_in_one_line_per_subject() {
    let dir = demo_copy();
    let mut args = vec!["fit", "--draws", "300", "--format", "table"];
    args.extend(DEMO_STUDY);
    let (code, out, err) = run(dir.path(), &args, None);
    assert_eq!(code, 0, "{err}");
    for id in ["P01", "P02", "P03"] {
        let lines = out.lines().filter(|l| l.split_whitespace().next() == Some(id)).count();
        assert_eq!(lines, 1, "{id}:\n{out}");
    }
    // The levels are left to --details.
    assert!(!out.contains("observed"), "{out}");
    args.push("--details");
    let (_, details, _) = run(dir.path(), &args, None);
    assert!(details.contains("observed") && details.lines().count() > out.lines().count(), "{details}");
}

/// Rows of a CSV text as maps from column name to field.
fn csv_rows(text: &str) -> Vec<std::collections::HashMap<String, String>> {
    let mut reader = csv::Reader::from_reader(text.as_bytes());
    let headers = reader.headers().unwrap().clone();
    reader
        .records()
        .map(|r| headers.iter().zip(r.unwrap().iter()).map(|(h, f)| (h.to_string(), f.to_string())).collect())
        .collect()
}

/// `--levels-out` writes each level's prediction at the fitted parameters: exactly what
/// `simulate` gives at those parameters and times (the same engine on the same inputs, an
/// exact identity), with residual = observed − predicted and levels below the limit flagged.
#[test]
fn levels_out_holds_the_predictions_simulate_gives_at_the_fitted_parameters() {
    let dir = demo_copy();
    let mut args = vec!["fit", "--draws", "300", "--format", "csv", "--levels-out", "levels-fit.csv"];
    args.extend(DEMO_STUDY);
    let (code, fits, err) = run(dir.path(), &args, None);
    assert_eq!(code, 0, "{err}");
    let levels = csv_rows(&std::fs::read_to_string(dir.path().join("levels-fit.csv")).unwrap());
    let fits = csv_rows(&fits);
    assert_eq!(levels.len(), 10, "every level of the demo");
    let mut blq = 0;
    for fit in &fits {
        let id = &fit["subject"];
        // The typical values and effective draws sit beside the estimates.
        for key in ["cl_l_h_typical", "v_l_typical", "effective_draws"] {
            assert!(fit[key].parse::<f64>().is_ok_and(|x| x > 0.0), "{id} {key}: {fit:?}");
        }
        let mine: Vec<_> = levels.iter().filter(|l| &l["subject"] == id).collect();
        let times: Vec<&str> = mine.iter().map(|l| l["time_h"].as_str()).collect();
        // The doses file holds an oral subject, so simulate needs ka (any, for the others) and
        // the model's F (0.8).
        let ka = if fit["ka_per_h"].is_empty() { "1" } else { fit["ka_per_h"].as_str() };
        let mut sim = vec![
            "simulate",
            "--doses",
            "doses.csv",
            "--cl",
            fit["cl_l_h"].as_str(),
            "--v",
            fit["v_l"].as_str(),
            "--ka",
            ka,
            "--f",
            "0.8",
        ];
        let at = times.join(",");
        sim.extend(["--at", at.as_str(), "--format", "csv"]);
        let (code, curve, err) = run(dir.path(), &sim, None);
        assert_eq!(code, 0, "{err}");
        let curve: Vec<_> = csv_rows(&curve).into_iter().filter(|r| &r["subject"] == id).collect();
        assert_eq!(curve.len(), mine.len());
        for (level, point) in mine.iter().zip(&curve) {
            assert_eq!(level["time_h"], point["time_h"]);
            assert_eq!(level["predicted_mg_l"], point["conc_mg_l"], "{id} at {} h", level["time_h"]);
            if level["blq"] == "true" {
                blq += 1;
                assert!(level["observed_mg_l"].is_empty() && level["residual_mg_l"].is_empty());
            } else {
                let (y, f): (f64, f64) =
                    (level["observed_mg_l"].parse().unwrap(), level["predicted_mg_l"].parse().unwrap());
                let r: f64 = level["residual_mg_l"].parse().unwrap();
                assert!((r - (y - f)).abs() <= 1e-12 * y.abs().max(1.0), "{level:?}");
            }
        }
    }
    assert!(blq > 0, "the demo has a level below the limit");
}

/// The points of the `series` paths of the SVG's first (linear) panel, in scene coordinates.
fn first_panel_series(svg: &str) -> Vec<(f64, f64)> {
    let panel = svg.split("<g transform=").nth(1).expect("a first panel");
    let mut points = Vec::new();
    for path in panel.split("<path class=\"series\" d=\"").skip(1) {
        let d = &path[..path.find('"').unwrap()];
        for step in d.split(['M', 'L']).filter(|s| !s.is_empty()) {
            let (x, y) = step.split_once(' ').unwrap();
            points.push((x.parse().unwrap(), y.parse().unwrap()));
        }
    }
    points
}

/// (value, y) of the labelled y-axis ticks of the SVG's first panel.
fn first_panel_y_ticks(svg: &str) -> Vec<(f64, f64)> {
    let panel = svg.split("<g transform=").nth(1).unwrap();
    let panel = &panel[..panel.find("</g>").unwrap()];
    panel
        .lines()
        .filter(|l| l.starts_with("<text") && l.contains(r#"text-anchor="end""#))
        .filter_map(|l| {
            let y: f64 = l.split("y=\"").nth(1)?.split('"').next()?.parse().ok()?;
            let label: f64 = l[l.find('>')? + 1..l.find("</text>")?].parse().ok()?;
            // The label's baseline sits 0.35 × its 8 pt size below the tick.
            Some((label, y - 0.35 * 8.0))
        })
        .collect()
}

/// At a 1-hour grid a 30-minute infusion's peak falls between two points; the plot samples the
/// exact curve, so its highest point is the level `simulate` gives at the infusion's end.
#[test]
fn the_svg_curve_reaches_the_exact_peak_at_an_infusion_end() {
    let dir = tempfile::tempdir().unwrap();
    let regimen = [
        "--dose",
        "1g",
        "--route",
        "infusion",
        "--duration",
        "30min",
        "--every",
        "24h",
        "--count",
        "1",
        "--cl",
        "4.2",
        "--v",
        "48",
    ];
    let mut args = vec!["simulate", "--times", "0:12:1", "--svg", "curve.svg", "--format", "csv"];
    args.extend(regimen);
    let (code, _, err) = run(dir.path(), &args, None);
    assert_eq!(code, 0, "{err}");
    let mut at_end = vec!["simulate", "--at", "0.5", "--format", "csv"];
    at_end.extend(regimen);
    let (_, peak, _) = run(dir.path(), &at_end, None);
    let peak: f64 = csv_rows(&peak)[0]["conc_mg_l"].parse().unwrap();

    let svg = std::fs::read_to_string(dir.path().join("curve.svg")).unwrap();
    let ticks = first_panel_y_ticks(&svg);
    assert!(ticks.len() >= 2, "{ticks:?}");
    let ((v0, y0), (v1, y1)) = (ticks[0], ticks[ticks.len() - 1]);
    let value = |y: f64| v0 + (y - y0) * (v1 - v0) / (y1 - y0);
    let top = first_panel_series(&svg).into_iter().map(|p| p.1).fold(f64::INFINITY, f64::min);
    // Coordinates are written to 0.01 pt.
    let per_point = ((v1 - v0) / (y1 - y0)).abs();
    assert!(
        (value(top) - peak).abs() <= 0.03 * per_point,
        "the plot peaks at {} mg/L, simulate gives {peak} mg/L at the infusion's end",
        value(top)
    );
}

/// Three subjects' dose ticks each take their subject's colour.
#[test]
fn each_subjects_doses_are_ticked_in_its_colour() {
    let dir = demo_copy();
    let args = [
        "simulate",
        "--doses",
        "doses.csv",
        "--cl",
        "4.2",
        "--v",
        "48",
        "--ka",
        "1",
        "--times",
        "0:48:1",
        "--svg",
        "curves.svg",
        "--format",
        "csv",
    ];
    let (code, _, err) = run(dir.path(), &args, None);
    assert_eq!(code, 0, "{err}");
    let svg = std::fs::read_to_string(dir.path().join("curves.svg")).unwrap();
    let panel = svg.split("<g transform=").nth(1).unwrap();
    let panel = &panel[..panel.find("</g>").unwrap()];
    let colour = |class: &str| -> std::collections::BTreeSet<String> {
        panel
            .split(&format!("<path class=\"{class}\""))
            .skip(1)
            .map(|p| p.split("stroke=\"").nth(1).unwrap().split('"').next().unwrap().to_string())
            .collect()
    };
    let (series, doses) = (colour("series"), colour("dose"));
    assert_eq!(series.len(), 3, "{series:?}");
    assert_eq!(doses, series);
}

/// Run `cistern ARGS` in `dir` under a pseudo-terminal (util-linux `script`), so that stderr is
/// a terminal; `None` where `script` is missing. Returns what the terminal showed.
fn on_a_terminal(dir: &Path, args: &[&str]) -> Option<String> {
    let command = format!("{} {}", env!("CARGO_BIN_EXE_cistern"), args.join(" "));
    let out = Command::new("script").args(["-qec", &command, "/dev/null"]).current_dir(dir).output().ok()?;
    assert!(out.status.success(), "{command}: {}", String::from_utf8_lossy(&out.stdout));
    Some(String::from_utf8_lossy(&out.stdout).into_owned())
}

/// A simulate of 2,000,001 values (above the million from which progress is shown), writing
/// to the file named last.
const LONG_SIMULATE: &[&str] = &[
    "simulate",
    "--dose",
    "1g",
    "--every",
    "12h",
    "--count",
    "6",
    "--duration",
    "1h",
    "--cl",
    "4.2",
    "--v",
    "48",
    "--times",
    "0:2000h:0.001h",
    "--allow-large",
    "-o",
];

#[test]
fn a_long_simulate_shows_progress_on_a_terminal_and_none_with_quiet() {
    // Issue: `--times 0:100000h:1min` wrote 529 MB for 18.6 s without a sign of life.
    let dir = tempfile::tempdir().unwrap();
    let Some(shown) = on_a_terminal(dir.path(), &[LONG_SIMULATE, &["big.csv"]].concat()) else {
        eprintln!("skipped: the progress check needs util-linux `script` for a pseudo-terminal");
        return;
    };
    assert!(shown.contains("rows written"), "no progress shown:\n{shown}");
    let quiet = on_a_terminal(dir.path(), &[LONG_SIMULATE, &["quiet.csv", "-q"]].concat()).unwrap();
    assert!(!quiet.contains("rows written"), "-q still shows progress:\n{quiet}");
    // Progress goes to the terminal, never into the data.
    let data = std::fs::read_to_string(dir.path().join("big.csv")).unwrap();
    assert_eq!(data.lines().count(), 2_000_002, "a header and 2,000,001 rows");
    assert_eq!(data, std::fs::read_to_string(dir.path().join("quiet.csv")).unwrap());
}

#[test]
fn a_piped_simulate_shows_no_progress() {
    let dir = tempfile::tempdir().unwrap();
    let (code, _, stderr) = run(dir.path(), &[LONG_SIMULATE, &["big.csv"]].concat(), None);
    assert_eq!(code, 0, "{stderr}");
    assert!(!stderr.contains("rows written"), "{stderr}");
}

/// Long fits and sweeps were silent for tens of seconds. Both now show progress on stderr
/// when it is a terminal (stdout goes to a file here, so what shows is stderr), and none with
/// `-q`.
/// The demo sweep of one regimen, without the number of subjects or the output flags.
const DEMO_SWEEP: [&str; 5] = ["sweep", "--model", "model.toml", "--covariates", "population.csv"];

#[test]
fn fit_and_sweep_show_progress_on_stderr_and_none_with_quiet() {
    let dir = crate::common::demo_copy();
    let fit = demo_args("fit", &["--draws", "200", "-o", "fit.csv"]);
    let sweep = [&DEMO_SWEEP[..], &ONE_REGIMEN, &["--subjects", "200000", "-o", "s.csv"]].concat();
    for (args, what) in [(&fit[..], "subjects fitted"), (&sweep[..], "/200000 subjects")] {
        let Some(shown) = on_a_terminal(dir.path(), args) else {
            eprintln!("skipped: the progress check needs util-linux `script` for a pseudo-terminal");
            return;
        };
        assert!(shown.contains(what), "no progress ({what}) shown:\n{shown}");
        let quiet = on_a_terminal(dir.path(), &[args, &["-q"]].concat()).unwrap();
        assert!(!quiet.contains(what), "-q still shows progress:\n{quiet}");
    }
}

/// Tables printed raw keys (`auc24_mg_h_l`, `pta_%`) as headers. The plan and sweep tables now
/// use human labels with units; the keys stay in CSV and JSON.
#[test]
fn tables_use_human_labels_with_units_not_keys() {
    let dir = crate::common::demo_copy();
    let plan = demo_args(
        "plan",
        &[&["--subject", "P01", "--draws", "200", "--format", "table"][..], &ONE_REGIMEN].concat(),
    );
    let sweep = [&DEMO_SWEEP[..], &ONE_REGIMEN, &["--subjects", "200"]].concat();
    for args in [&plan, &[&sweep[..], &["--format", "table"]].concat()] {
        let (code, out, err) = run(dir.path(), args, Some("200"));
        assert_eq!(code, 0, "{err}");
        for key in ["auc24_mg_h_l", "trough_mg_l", "pta_%", "peak_mg_l", "every_h", "amount_mg"] {
            assert!(!out.contains(key), "the key {key} in a table:\n{out}");
        }
        assert!(out.contains("AUC24") && out.contains("mg·h/L") && out.contains("PTA"), "{out}");
    }
    let (_, csv, _) = run(dir.path(), &[&sweep[..], &["--format", "csv"]].concat(), None);
    let header = csv.lines().next().unwrap_or_default();
    assert!(header.contains("auc24") && header.contains("_mg_h_l"), "the CSV keeps the keys: {header}");
}
