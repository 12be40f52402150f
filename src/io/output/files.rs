//! The files of one run: every input and output declared together, checked against one
//! another as files (not as path strings), and each output opened before the work starts.
//!
//! - **Identity.** Two paths name the same file when they reach the same device and inode
//!   (through `./`, `..`, symbolic links, hard links or bind mounts); an output that does not
//!   exist yet is its real directory and its name. No output may be an input or another
//!   output of the same run; two outputs to standard output are refused too.
//! - **Where the bytes go.** A symbolic link at an output is followed: its target is written.
//!   A new file, or an existing regular file, is written under a temporary name in its
//!   directory (created exclusively, with an unpredictable short name, never through a link),
//!   synced, and renamed over it, and the directory is synced, so a crash leaves the old file
//!   or the new one. An existing file keeps its mode, and its owner where permitted; a new
//!   file follows the umask. A device or a FIFO (`/dev/null`, a named pipe) is written in
//!   place: it is never replaced by a regular file.
//! - **Interruptions.** The temporary files of unfinished outputs are listed process-wide;
//!   [`remove_unfinished`] removes them, for a binary's signal handler.

use crate::error::{Error, InputError, Origin};
use std::fs::{File, Metadata};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard, PoisonError};
use tempfile::TempPath;

/// The files of one run. Declare the inputs, then open each output with [`RunFiles::open`]
/// before the work starts: a path that cannot be written, or that names an input or another
/// output, then fails before anything is computed. `RunFiles::default()` reads no file.
#[derive(Default)]
pub struct RunFiles {
    /// The inputs that exist, as files, with their paths as given.
    inputs: Vec<(Identity, String)>,
    /// The outputs opened so far: identity, flag, and the destination as shown.
    outputs: Vec<(Identity, Origin, String)>,
}

/// How standard output is named in messages.
const STDOUT: &str = "standard output";

/// Which file a path names.
#[derive(Debug, Clone, PartialEq, Eq)]
enum Identity {
    /// An existing file: its device and inode (on Unix), else its canonical path.
    File(FileId),
    /// A file that does not exist yet: its directory's canonical path and its name.
    New(PathBuf),
    /// Standard output, where it cannot be looked at as a file.
    Stdout,
}

#[cfg(unix)]
type FileId = (u64, u64);
#[cfg(not(unix))]
type FileId = PathBuf;

impl RunFiles {
    /// A run reading `inputs` (paths that do not exist are left out: reading them fails with
    /// its own message).
    pub fn new<P: AsRef<Path>>(inputs: impl IntoIterator<Item = P>) -> RunFiles {
        let inputs = inputs
            .into_iter()
            .filter_map(|p| {
                let p = p.as_ref();
                let meta = std::fs::metadata(p).ok()?;
                Some((Identity::File(file_id(p, &meta)?), p.to_string_lossy().into_owned()))
            })
            .collect();
        RunFiles { inputs, outputs: Vec::new() }
    }

    /// [`open`](Self::open) the file an optional output flag names, if it names one.
    pub fn open_flag(&mut self, flag: &str, path: Option<&str>) -> Result<Option<Sink>, Error> {
        path.map(|p| self.open(Origin::Flag(flag.into()), p)).transpose()
    }

    /// Open the output `path` that `origin` (a flag) asks for; `-` is standard output.
    ///
    /// Errors: an empty path, a directory, an input or another output of the run (bad usage,
    /// exit code 2); a file that cannot be created (a failure, exit code 1).
    pub fn open(&mut self, origin: Origin, path: &str) -> Result<Sink, Error> {
        let usage = |message: String| Error::from(InputError::at(origin.clone(), message));
        if path.is_empty() {
            return Err(usage("the output file name is empty; give a file, or - for standard output".into()));
        }
        if path == "-" {
            self.claim(Identity::stdout(), &origin, STDOUT.into())?;
            return Ok(Sink(Out::Stdout(std::io::BufWriter::new(std::io::stdout().lock()))));
        }
        let target = follow_links(Path::new(path))
            .map_err(|e| Error::Failure(format!("cannot create the output '{path}': {e}")))?;
        let existing = std::fs::metadata(&target).ok();
        if existing.as_ref().is_some_and(Metadata::is_dir) {
            return Err(usage(format!("'{path}' is a directory; give a file name")));
        }
        let identity = match &existing {
            Some(meta) => file_id(&target, meta).map(Identity::File),
            None => new_file_id(&target),
        };
        if let Some(identity) = identity {
            self.claim(identity, &origin, format!("'{path}'"))?;
        }
        let cannot = |e: std::io::Error| Error::Failure(format!("cannot create the output '{path}': {e}"));
        match existing {
            Some(meta) if !meta.is_file() => {
                let file = std::fs::OpenOptions::new().write(true).open(&target).map_err(cannot)?;
                Ok(Sink(Out::InPlace(std::io::BufWriter::new(file))))
            }
            existing => {
                let (file, temp) = Temporary::create(directory(&target)).map_err(cannot)?;
                if let Some(meta) = existing {
                    keep_owner_and_mode(&file, &meta).map_err(cannot)?;
                }
                Ok(Sink(Out::Replace { writer: std::io::BufWriter::new(file), temp, target }))
            }
        }
    }

    /// Record an output, refusing one that is an input or an earlier output.
    fn claim(&mut self, identity: Identity, origin: &Origin, shown: String) -> Result<(), Error> {
        if let Some((_, input)) = self.inputs.iter().find(|(i, _)| *i == identity) {
            return Err(InputError::at(
                origin.clone(),
                format!("refusing to write the output over the input file '{input}'; choose another path"),
            )
            .into());
        }
        if let Some((_, other, other_shown)) = self.outputs.iter().find(|(i, _, _)| *i == identity) {
            let message = if shown == STDOUT && other_shown == STDOUT {
                format!("{other} also writes to standard output; give one of them a file")
            } else {
                format!("{shown} is also where {other} writes ({other_shown}); give each output its own file")
            };
            return Err(InputError::at(origin.clone(), message).into());
        }
        self.outputs.push((identity, origin.clone(), shown));
        Ok(())
    }
}

impl Identity {
    /// Standard output: the file it is (a terminal, a pipe, a redirected file), where it can
    /// be looked at.
    fn stdout() -> Identity {
        #[cfg(unix)]
        {
            use std::os::fd::AsFd;
            let meta =
                std::io::stdout().as_fd().try_clone_to_owned().map(File::from).and_then(|f| f.metadata());
            if let Ok(meta) = meta {
                use std::os::unix::fs::MetadataExt;
                return Identity::File((meta.dev(), meta.ino()));
            }
        }
        Identity::Stdout
    }
}

/// The identity of the existing file at `path` with metadata `meta`.
#[cfg(unix)]
fn file_id(_: &Path, meta: &Metadata) -> Option<FileId> {
    use std::os::unix::fs::MetadataExt;
    Some((meta.dev(), meta.ino()))
}

/// The identity of the existing file at `path`.
#[cfg(not(unix))]
fn file_id(path: &Path, _: &Metadata) -> Option<FileId> {
    std::fs::canonicalize(path).ok()
}

/// The identity of a file that does not exist yet: its real directory and its name.
fn new_file_id(path: &Path) -> Option<Identity> {
    let dir = std::fs::canonicalize(directory(path)).ok()?;
    Some(Identity::New(dir.join(path.file_name()?)))
}

/// The path a symbolic link at `path` leads to, link after link (a dangling link's target is
/// where the output is created); `path` itself when it is no link.
fn follow_links(path: &Path) -> std::io::Result<PathBuf> {
    let mut path = path.to_path_buf();
    // As many links as Linux follows in one path lookup.
    for _ in 0..40 {
        match std::fs::symlink_metadata(&path) {
            Ok(meta) if meta.file_type().is_symlink() => {
                let link = std::fs::read_link(&path)?;
                path = directory(&path).join(link);
            }
            _ => return Ok(path),
        }
    }
    Err(std::io::Error::other("too many levels of symbolic links"))
}

/// Give a replacement the owner (where permitted: only root may give a file away) and the
/// mode of the file it replaces. The owner first: changing it clears set-user-ID bits.
fn keep_owner_and_mode(file: &File, meta: &Metadata) -> std::io::Result<()> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        let _ = std::os::unix::fs::fchown(file, Some(meta.uid()), Some(meta.gid()));
    }
    file.set_permissions(meta.permissions())
}

/// The directory a file path is in (`.` for a bare name).
fn directory(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Where output goes: standard output, a file written under a temporary name and renamed
/// into place on [`Sink::finish`] (so a failed run never leaves a partial or clobbered file),
/// or a device or FIFO written in place. Opened by [`RunFiles::open`].
pub struct Sink(Out);

enum Out {
    Stdout(std::io::BufWriter<std::io::StdoutLock<'static>>),
    /// A new or regular file: the temporary file and the path it becomes.
    Replace {
        writer: std::io::BufWriter<File>,
        temp: Temporary,
        target: PathBuf,
    },
    /// A device or FIFO.
    InPlace(std::io::BufWriter<File>),
}

impl Sink {
    /// The writer to print into.
    pub fn writer(&mut self) -> &mut dyn Write {
        match &mut self.0 {
            Out::Stdout(w) => w,
            Out::Replace { writer, .. } | Out::InPlace(writer) => writer,
        }
    }

    /// Flush and, for a file, move it into place durably: its data reaches the disk before the
    /// rename, and the rename then too where the platform can sync a directory.
    pub fn finish(self) -> Result<(), Error> {
        match self.0 {
            Out::Stdout(mut w) => w.flush().map_err(super::io_failure),
            Out::InPlace(w) => w.into_inner().map(drop).map_err(|e| super::io_failure(e.into_error())),
            Out::Replace { writer, temp, target } => {
                let file = writer.into_inner().map_err(|e| super::io_failure(e.into_error()))?;
                file.sync_all().map_err(super::io_failure)?;
                drop(file);
                temp.persist(&target)
                    .map_err(|e| Error::Failure(format!("cannot write '{}': {e}", target.display())))?;
                // Make the rename durable too. Best effort: the output is in place already, and
                // some file systems (and platforms) cannot sync a directory.
                if let Ok(dir) = File::open(directory(&target)) {
                    let _ = dir.sync_all();
                }
                Ok(())
            }
        }
    }
}

/// The temporary files of the outputs not yet finished, process-wide; `None` once
/// [`remove_unfinished`] has run, so that no more are made.
static UNFINISHED: Mutex<Option<Vec<PathBuf>>> = Mutex::new(Some(Vec::new()));

fn unfinished() -> MutexGuard<'static, Option<Vec<PathBuf>>> {
    UNFINISHED.lock().unwrap_or_else(PoisonError::into_inner)
}

/// Remove the temporary file of every output not yet finished, and make no more: for a
/// signal handler (Ctrl-C, SIGTERM) just before the process exits, so an interrupted run
/// leaves no temporary file behind.
pub fn remove_unfinished() {
    for path in unfinished().take().unwrap_or_default() {
        let _ = std::fs::remove_file(path);
    }
}

/// A temporary file listed in [`UNFINISHED`] from its creation until it is renamed into place
/// or removed.
struct Temporary(Option<TempPath>);

impl Temporary {
    /// Create a temporary file in `dir`: exclusively (never through a link planted at its
    /// name), under a short unpredictable name (`.cistern-` and six random characters), so
    /// that any valid output name can have one beside it.
    fn create(dir: &Path) -> std::io::Result<(File, Temporary)> {
        let mut list = unfinished();
        let Some(list) = list.as_mut() else {
            return Err(std::io::Error::other("the run is being interrupted"));
        };
        // `create_new` (not tempfile's own create) gives the finished file a plain create's
        // permissions rather than 0600, and errors that do not name the temporary file.
        let (file, path) = tempfile::Builder::new()
            .prefix(".cistern-")
            .suffix(".tmp")
            .make_in(dir, |temp| File::create_new(temp))?
            .into_parts();
        list.push(path.to_path_buf());
        Ok((file, Temporary(Some(path))))
    }

    /// Rename the file to `target`, replacing what is there. The list stays locked until the
    /// rename is done, so an interruption removes the file or finds it renamed, never both.
    fn persist(mut self, target: &Path) -> std::io::Result<()> {
        let mut list = unfinished();
        match self.0.take() {
            Some(path) => {
                forget(&mut list, &path);
                path.persist(target).map_err(|e| e.error)
            }
            None => Ok(()),
        }
    }
}

impl Drop for Temporary {
    fn drop(&mut self) {
        if let Some(path) = self.0.take() {
            let mut list = unfinished();
            forget(&mut list, &path);
            // Dropping the path removes the file.
        }
    }
}

/// Take `path` off the list of unfinished outputs.
fn forget(list: &mut Option<Vec<PathBuf>>, path: &Path) {
    if let Some(list) = list {
        list.retain(|p| p != path);
    }
}
