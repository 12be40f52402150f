//! Reading an input file whole: the one place every reader (CSV tables, TOML files, saved fits,
//! shard states, fingerprints and digests) takes its bytes from, so that one size cap and one
//! rule about special files hold for all of them.
//!
//! A device such as `/dev/zero` or `/dev/urandom` never ends, and a huge file would be read
//! into memory before any problem is found: a device is refused, and anything larger than
//! [`MAX_INPUT_BYTES`] is refused with its size, before the memory is taken. Pipes (`<(…)`,
//! `/dev/stdin` from a pipe) are read, up to the same cap.

use crate::error::InputError;
use std::io::Read;
use std::path::Path;

/// The largest input file read: 1 GiB, far above any study, model, case, saved fit or shard
/// state (a saved fit keeps at most 100,000 draws a subject), far below the memory of an
/// ordinary machine.
pub const MAX_INPUT_BYTES: u64 = 1 << 30;

/// Read the file at `path` whole. Errors name the file as given.
pub fn read(path: &Path) -> Result<Vec<u8>, InputError> {
    let shown = path.to_string_lossy();
    let problem = |message: String| InputError::in_file(shown.as_ref(), message);
    let file = std::fs::File::open(path).map_err(|e| problem(format!("cannot read the file: {e}")))?;
    let meta = file.metadata().map_err(|e| problem(format!("cannot read the file: {e}")))?;
    if meta.is_dir() {
        return Err(problem("this is a directory; expected a file".into()));
    }
    if is_device(&meta) {
        return Err(problem("this is a device, not a file; give a file (or a pipe)".into()));
    }
    let too_large = |size: String| {
        problem(format!("the file is {size}, more than the {} GiB an input may hold", MAX_INPUT_BYTES >> 30))
    };
    if meta.len() > MAX_INPUT_BYTES {
        return Err(too_large(format!("{} bytes", meta.len())));
    }
    // A pipe has no length, and a file may grow while it is read: read one byte past the cap
    // to tell.
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    file.take(MAX_INPUT_BYTES + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| problem(format!("cannot read the file: {e}")))?;
    if bytes.len() as u64 > MAX_INPUT_BYTES {
        return Err(too_large("larger".into()));
    }
    Ok(bytes)
}

/// Read the file at `path` whole as UTF-8 text; text that is not UTF-8 is refused with the
/// line it is found on.
pub fn read_text(path: &Path) -> Result<String, InputError> {
    String::from_utf8(read(path)?).map_err(|e| {
        let valid = &e.as_bytes()[..e.utf8_error().valid_up_to()];
        let line = valid.iter().filter(|&&b| b == b'\n').count() as u64 + 1;
        InputError::in_file(path.to_string_lossy(), "the file is not UTF-8 text").at_line(line)
    })
}

/// A character or block device (`/dev/zero`, a disk, a terminal).
#[cfg(unix)]
fn is_device(meta: &std::fs::Metadata) -> bool {
    use std::os::unix::fs::FileTypeExt;
    meta.file_type().is_char_device() || meta.file_type().is_block_device()
}

/// Devices are told apart only on Unix; elsewhere the size cap still bounds the read.
#[cfg(not(unix))]
fn is_device(_: &std::fs::Metadata) -> bool {
    false
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn text_that_is_not_utf8_is_refused_with_its_line() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("bad.toml");
        std::fs::write(&path, b"a = 1\nb = \"\xff\"\n").unwrap();
        let e = read_text(&path).unwrap_err();
        assert_eq!(e.line(), Some(2));
        assert!(e.message.contains("not UTF-8"), "{e}");
    }

    #[cfg(unix)]
    #[test]
    fn a_device_is_refused_before_it_is_read() {
        let e = read(Path::new("/dev/zero")).unwrap_err();
        assert_eq!(e.to_string(), "/dev/zero: this is a device, not a file; give a file (or a pipe)");
    }
}
