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
    #[cfg(test)]
    SYNCED_DIRS.with(|s| s.borrow_mut().push(path.to_path_buf()));
    fs::File::open(path)?.sync_all()
}

// Folders this thread synced, so unit tests can check that a rename was
// made durable.
#[cfg(test)]
thread_local! {
    pub static SYNCED_DIRS: std::cell::RefCell<Vec<PathBuf>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// The folder a path lives in: its parent, or `.` for a bare file name
/// (whose parent is the empty path, which cannot be opened to sync).
pub fn parent_dir(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

fn temp_path(dest: &Path) -> PathBuf {
    let name = dest
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    parent_dir(dest).join(format!("{TEMP_PREFIX}{}-{name}", std::process::id()))
}

/// A file written under a temp name and hashed (blake3) as it is written,
/// for files named by their content: `finish` fsyncs it, renames it to the
/// name made from its hash and fsyncs the folder. Dropped unfinished, the
/// temp file is removed (and a crash leaves one that the next start removes).
pub struct HashedFile {
    out: Option<std::io::BufWriter<fs::File>>,
    hasher: blake3::Hasher,
    bytes: u64,
    tmp: PathBuf,
}

impl HashedFile {
    /// Starts a file in `dir`; `label` only tells temp files apart.
    pub fn create(dir: &Path, label: &str) -> std::io::Result<HashedFile> {
        let tmp = dir.join(format!("{TEMP_PREFIX}{}-{label}", std::process::id()));
        let file = fs::File::create(&tmp)?;
        Ok(HashedFile {
            out: Some(std::io::BufWriter::with_capacity(1 << 20, file)),
            hasher: blake3::Hasher::new(),
            bytes: 0,
            tmp,
        })
    }

    /// Makes the file durable under `name(hash)` in its folder. Returns the
    /// path, the hash and the size.
    pub fn finish(
        mut self,
        name: impl FnOnce(&blake3::Hash) -> String,
    ) -> std::io::Result<(PathBuf, blake3::Hash, u64)> {
        let out = self.out.take().expect("finished once");
        // Every failure from here on, the last flush included, removes the
        // temp file (`Drop` no longer does, `out` being taken).
        let result = (|| {
            let file = out.into_inner().map_err(|e| e.into_error())?;
            file.sync_all()?;
            drop(file);
            let hash = self.hasher.finalize();
            let dest = parent_dir(&self.tmp).join(name(&hash));
            fs::rename(&self.tmp, &dest)?;
            sync_dir(parent_dir(&dest))?;
            Ok((dest, hash, self.bytes))
        })();
        if result.is_err() {
            let _ = fs::remove_file(&self.tmp);
        }
        result
    }
}

impl Write for HashedFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let out = self.out.as_mut().expect("not finished");
        let n = out.write(buf)?;
        self.hasher.update(&buf[..n]);
        self.bytes += n as u64;
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.out.as_mut().expect("not finished").flush()
    }
}

impl Drop for HashedFile {
    fn drop(&mut self) {
        if self.out.take().is_some() {
            let _ = fs::remove_file(&self.tmp);
        }
    }
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
        sync_dir(parent_dir(dest))
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
        sync_dir(parent_dir(dest))?;
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

    #[test]
    fn a_hashed_file_is_named_by_what_was_written_and_leaves_no_temp_behind() {
        let d = tempfile::tempdir().unwrap();
        let text = b"row one\nrow two\n".repeat(1000);
        let mut f = HashedFile::create(d.path(), "b000001").unwrap();
        for chunk in text.chunks(333) {
            f.write_all(chunk).unwrap();
        }
        let (path, hash, bytes) = f.finish(|h| format!("{}.bin", &h.to_hex()[..8])).unwrap();
        assert_eq!(hash, blake3::hash(&text));
        assert_eq!(bytes, text.len() as u64);
        assert_eq!(fs::read(&path).unwrap(), text);
        assert_eq!(
            path.file_name().unwrap().to_string_lossy(),
            format!("{}.bin", &hash.to_hex()[..8])
        );
        // Only the named file is there, and the rename was made durable.
        let names: Vec<_> = fs::read_dir(d.path())
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        assert_eq!(names, vec![path]);
        assert!(SYNCED_DIRS.with(|s| s.borrow().iter().any(|p| p == d.path())));
        // Dropped before `finish`: nothing is left.
        let mut g = HashedFile::create(d.path(), "b000002").unwrap();
        g.write_all(b"half").unwrap();
        drop(g);
        assert_eq!(fs::read_dir(d.path()).unwrap().count(), 1);
    }
}
