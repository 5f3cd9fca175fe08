//! Writing files so that a reader sees either the old file or the complete new one:
//! temp file in the same directory → fsync → rename → fsync of the directory.

use std::fs::{self, File};
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::{Error, Result};

/// The temporary name used while `path` is being written.
pub fn temp_path(path: &Path) -> PathBuf {
    let mut name = path
        .file_name()
        .map(|n| n.to_os_string())
        .unwrap_or_default();
    name.push(".tmp");
    path.with_file_name(name)
}

/// Writes `bytes` to `path` atomically.
pub fn write(path: &Path, bytes: &[u8]) -> Result<()> {
    write_with(path, |file| file.write_all(bytes))
}

/// Writes `path` atomically with `fill` writing the content into the temporary file.
pub fn write_with(path: &Path, fill: impl FnOnce(&mut File) -> std::io::Result<()>) -> Result<()> {
    let tmp = temp_path(path);
    let outcome = (|| {
        let mut file = File::create(&tmp)?;
        fill(&mut file)?;
        file.sync_all()?;
        Ok(())
    })();
    if let Err(e) = outcome {
        let _ = fs::remove_file(&tmp);
        return Err(Error::io(path, e));
    }
    finish(&tmp, path)
}

/// Renames a completely written temporary file over `path` and syncs the directory.
pub fn finish(tmp: &Path, path: &Path) -> Result<()> {
    if let Err(e) = fs::rename(tmp, path) {
        let _ = fs::remove_file(tmp);
        return Err(Error::io(path, e));
    }
    sync_dir(path);
    Ok(())
}

/// Syncs the directory holding `path` (best effort: not every platform allows it).
pub fn sync_dir(path: &Path) {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    if let Ok(d) = File::open(dir) {
        let _ = d.sync_all();
    }
}

/// Checks that `path` can be written as an output file: its directory exists and is a
/// directory, and `path` itself is not a directory. Nothing is created.
pub fn check_output(path: &Path, what: &str) -> Result<()> {
    if path.is_dir() {
        return Err(Error::usage(format!(
            "the {what} path {} is a directory; give a file name",
            path.display()
        )));
    }
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    if dir.exists() && !dir.is_dir() {
        return Err(Error::usage(format!(
            "cannot write the {what} {}: {} is a file, not a directory; choose another path",
            path.display(),
            dir.display()
        )));
    }
    if !dir.is_dir() {
        return Err(Error::usage(format!(
            "the directory {} for the {what} does not exist; create it first",
            dir.display()
        )));
    }
    let meta = fs::metadata(dir).map_err(|e| Error::io(dir, e))?;
    if meta.permissions().readonly() {
        return Err(Error::usage(format!(
            "the directory {} for the {what} is not writable",
            dir.display()
        )));
    }
    Ok(())
}
