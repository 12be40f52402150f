//! Records a build identifier, `CISTERN_BUILD`: the SHA-256 of the package's sources (the
//! manifest, the lock file, this script and every file under `src/`) and the target platform.
//! A sweep's shards record it, so shards computed by two builds that share a version number
//! but not their code (or their platform's logarithm) are not merged. It is taken from the
//! sources rather than from git so that it needs no repository (a source tarball builds the
//! same identifier) and tells an edited working tree from its commit.

use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

fn main() {
    let mut files = vec![PathBuf::from("Cargo.toml"), PathBuf::from("Cargo.lock"), PathBuf::from("build.rs")];
    collect(Path::new("src"), &mut files);
    files.sort();
    let mut hasher = Sha256::new();
    for file in &files {
        // A missing lock file (a library checkout without one) is left out; the path and the
        // length go in first so that moving bytes between files changes the digest.
        if let Ok(bytes) = std::fs::read(file) {
            hasher.update(file.to_string_lossy().as_bytes());
            hasher.update([0]);
            hasher.update((bytes.len() as u64).to_le_bytes());
            hasher.update(&bytes);
        }
    }
    for watched in ["Cargo.toml", "Cargo.lock", "build.rs", "src"] {
        println!("cargo:rerun-if-changed={watched}");
    }
    let digest: String = hasher.finalize().iter().take(8).map(|b| format!("{b:02x}")).collect();
    let target = std::env::var("TARGET").unwrap_or_else(|_| "unknown-target".into());
    println!("cargo:rustc-env=CISTERN_BUILD=sources {digest}, {target}");
}

/// Every file under `dir`, recursively.
fn collect(dir: &Path, files: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else { return };
    for entry in entries.flatten() {
        let path = entry.path();
        if path.is_dir() {
            collect(&path, files);
        } else {
            files.push(path);
        }
    }
}
