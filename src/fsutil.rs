//! Durable file operations: fsync of files and folders, atomic replacement
//! (temp file in the same folder, fsync, rename, fsync the folder), and the
//! clean-up of temp files a crash left behind.

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

/// Prefix of every temp file tidegate writes; anything with it is stale at start.
pub const TEMP_PREFIX: &str = ".tidegate-tmp-";

pub fn sync_file(path: &Path) -> std::io::Result<()> {
    fs::File::open(path)?.sync_all()
}

pub fn sync_dir(path: &Path) -> std::io::Result<()> {
    fs::File::open(path)?.sync_all()
}

/// The folder `dest` is in; "." for a bare file name, whose parent is "".
fn parent_of(dest: &Path) -> &Path {
    dest.parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
}

fn temp_path(dest: &Path) -> PathBuf {
    let name = dest
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    parent_of(dest).join(format!("{TEMP_PREFIX}{}-{name}", std::process::id()))
}

/// Creates (or truncates) `path`, writes `bytes` and fsyncs the file.
fn write_synced(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let mut f = fs::OpenOptions::new()
        .write(true)
        .create(true)
        .truncate(true)
        .open(path)?;
    f.write_all(bytes)?;
    f.sync_all()
}

/// Writes `bytes` to `dest` so that a reader (or a crash) sees either the
/// old file or the whole new one, never a part.
pub fn write_atomic(dest: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let tmp = temp_path(dest);
    let result = (|| {
        write_synced(&tmp, bytes)?;
        fs::rename(&tmp, dest)?;
        sync_dir(parent_of(dest))
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result
}

/// Writes `bytes` to `dest` only if `dest` does not exist yet (atomically,
/// durably). Returns false when it already existed.
pub fn write_new(dest: &Path, bytes: &[u8]) -> std::io::Result<bool> {
    let tmp = temp_path(dest);
    let result = (|| {
        write_synced(&tmp, bytes)?;
        // A hard link fails if the name is taken, unlike rename.
        let created = match fs::hard_link(&tmp, dest) {
            Ok(()) => true,
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => false,
            Err(e) => return Err(e),
        };
        fs::remove_file(&tmp)?;
        sync_dir(parent_of(dest))?;
        Ok(created)
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result
}

/// Removes temp files left in `dir` by an interrupted write. Returns how many.
pub fn remove_stale_temps(dir: &Path) -> std::io::Result<usize> {
    let mut n = 0;
    let entries = match fs::read_dir(dir) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(0),
        Err(e) => return Err(e),
    };
    for entry in entries {
        let entry = entry?;
        if entry.file_name().to_string_lossy().starts_with(TEMP_PREFIX) {
            // Checkpoints are written as temp folders, other files as temp files.
            if entry.file_type()?.is_dir() {
                fs::remove_dir_all(entry.path())?;
            } else {
                fs::remove_file(entry.path())?;
            }
            n += 1;
        }
    }
    if n > 0 {
        sync_dir(dir)?;
    }
    Ok(n)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn atomic_write_and_write_new() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("x");
        write_atomic(&p, b"one").unwrap();
        write_atomic(&p, b"two").unwrap();
        assert_eq!(fs::read(&p).unwrap(), b"two");
        assert!(!write_new(&p, b"three").unwrap());
        assert_eq!(fs::read(&p).unwrap(), b"two");
        assert!(write_new(&d.path().join("y"), b"new").unwrap());
        assert_eq!(
            fs::read_dir(d.path()).unwrap().count(),
            2,
            "no temp files left"
        );
        fs::write(d.path().join(format!("{TEMP_PREFIX}9-z")), b"stale").unwrap();
        fs::create_dir(d.path().join(format!("{TEMP_PREFIX}9-m000003"))).unwrap();
        fs::write(
            d.path().join(format!("{TEMP_PREFIX}9-m000003/weights")),
            b"half",
        )
        .unwrap();
        assert_eq!(remove_stale_temps(d.path()).unwrap(), 2);
        assert_eq!(fs::read_dir(d.path()).unwrap().count(), 2);
    }
}
