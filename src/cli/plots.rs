//! `--plots-dir DIR` of `fit` and `population`: one SVG per diagnostic plot, under the names
//! of `cistern::diagnostics::plots::FILES`, each written atomically.

use super::args::Notify;
use cistern::diagnostics::plots::FILES;
use cistern::io::output::{CAUTION, RunFiles, Sink, io_failure};
use cistern::report::plot::Figure;
use cistern::report::svg::render_scenes;
use cistern::{Error, InputError, Origin};
use std::path::Path;

/// The plots' files, opened before the work (so that a bad directory, or a name that is an
/// input or another output, fails first).
pub struct PlotsDir {
    dir: String,
    sinks: Vec<(&'static str, Sink)>,
}

impl PlotsDir {
    /// Open every plot's file in `dir`, which must exist.
    pub fn open(files: &mut RunFiles, dir: Option<&str>) -> Result<Option<PlotsDir>, Error> {
        let Some(dir) = dir else { return Ok(None) };
        if !Path::new(dir).is_dir() {
            return Err(InputError::flag("--plots-dir", format!("'{dir}' is not a directory")).into());
        }
        let mut sinks = Vec::new();
        for name in FILES {
            let path = Path::new(dir).join(name);
            sinks.push((name, files.open(Origin::Flag("--plots-dir".into()), &path.to_string_lossy())?));
        }
        Ok(Some(PlotsDir { dir: dir.to_string(), sinks }))
    }

    /// Write each figure to its file, with the caution under it; a plot with nothing to draw
    /// (no model: no PRED, CWRES, NPDE or random effects) is not written, and a note says so.
    pub fn write(self, figures: &[Figure], notify: &Notify) -> Result<(), Error> {
        let mut skipped = Vec::new();
        for (name, mut sink) in self.sinks {
            match figures.iter().find(|f| f.file == name) {
                Some(figure) => {
                    let svg = render_scenes(&[figure.scene()], CAUTION);
                    sink.writer().write_all(svg.as_bytes()).map_err(io_failure)?;
                    sink.finish()?;
                }
                None => skipped.push(name),
            }
        }
        if !skipped.is_empty() {
            notify.note(&format!("nothing to draw for {} (not written)", skipped.join(", ")));
        }
        notify.note(&format!("wrote the diagnostic plots into {}", self.dir));
        Ok(())
    }
}
