//! The inbox: which names count as published files, and when a file is
//! settled enough to take.
//!
//! Watcher events are only wake-ups; what the daemon acts on is always a
//! fresh listing. A producer publishes by writing under `inbox/.tmp/` (or a
//! `*.part` name) and renaming; those, and every dotfile, are never listed.
//! A file written in place is taken only once its size, mtime, inode and
//! mode were seen unchanged for `settle_seconds` of the daemon's clock.

use std::collections::HashMap;
use std::fs;
use std::os::unix::ffi::OsStrExt;
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};

use chrono::{DateTime, TimeDelta, Utc};

/// What is compared between listings to tell whether a file still changes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Signature {
    pub len: u64,
    pub mtime_ns: i128,
    pub ino: u64,
    /// Permission bits: a file that could not be read is tried again once
    /// they change (chmod changes neither size nor mtime).
    pub mode: u32,
    /// Regular files settle; links and special files are refused unread, at once.
    pub regular: bool,
}

impl Signature {
    pub fn of(meta: &fs::Metadata) -> Signature {
        Signature {
            len: meta.len(),
            mtime_ns: i128::from(meta.mtime()) * 1_000_000_000 + i128::from(meta.mtime_nsec()),
            ino: meta.ino(),
            mode: meta.mode() & 0o7777,
            regular: meta.file_type().is_file(),
        }
    }
}

/// Whether a name in the inbox is a published file (not a temp or hidden one).
pub fn is_published(name: &str) -> bool {
    is_published_bytes(name.as_bytes())
}

fn is_published_bytes(name: &[u8]) -> bool {
    !name.starts_with(b".") && !name.ends_with(b".part") && !name.is_empty()
}

/// Lists the published entries of the inbox, sorted by name so files are
/// taken in a stable order. A directory with a published name is listed
/// like a special file: intake refuses it at once (moved to `refused/`
/// with its reasons and a `batch-refused` entry), as `ingest DIR` does,
/// so nothing sits in the inbox unexplained. Dotfiles and `*.part` names
/// are files still being written; `status` counts them.
pub fn list(inbox: &Path) -> std::io::Result<Vec<(PathBuf, Signature)>> {
    let mut out = Vec::new();
    for entry in fs::read_dir(inbox)? {
        let entry = entry?;
        // Names need not be UTF-8 (intake names such a file lossily); the
        // rules look at bytes.
        let name = entry.file_name();
        if !is_published_bytes(name.as_bytes()) {
            continue;
        }
        // Gone between the listing and the stat: the next listing decides.
        let Ok(meta) = fs::symlink_metadata(entry.path()) else {
            continue;
        };
        out.push((entry.path(), Signature::of(&meta)));
    }
    out.sort_by(|a, b| a.0.cmp(&b.0));
    Ok(out)
}

/// What sits in an inbox, for `status`: entries the daemon will take
/// (published names, directories included: those are refused) and entries
/// it leaves alone because they are still being written (dotfiles, `*.part`
/// names, anything under a dot folder such as `.tmp/`).
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize)]
pub struct Contents {
    pub waiting: Vec<String>,
    pub being_written: Vec<String>,
}

/// Lists `inbox` for `status` (a missing inbox is empty). Names are
/// relative to the inbox.
pub fn contents(inbox: &Path) -> std::io::Result<Contents> {
    let mut c = Contents::default();
    let entries = match fs::read_dir(inbox) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(c),
        Err(e) => return Err(e),
    };
    for entry in entries {
        let entry = entry?;
        let name = entry.file_name();
        let shown = name.to_string_lossy().into_owned();
        if is_published_bytes(name.as_bytes()) {
            c.waiting.push(shown);
        } else if entry.file_type()?.is_dir() {
            // A publishing folder: what is inside is on its way.
            for inner in fs::read_dir(entry.path())? {
                let inner = inner?;
                c.being_written
                    .push(format!("{shown}/{}", inner.file_name().to_string_lossy()));
            }
        } else {
            c.being_written.push(shown);
        }
    }
    c.waiting.sort();
    c.being_written.sort();
    Ok(c)
}

#[derive(Debug, Clone, Copy)]
struct Seen {
    signature: Signature,
    since: DateTime<Utc>,
}

/// Tracks files between listings and says which ones have settled.
#[derive(Debug)]
pub struct Settler {
    settle: TimeDelta,
    seen: HashMap<PathBuf, Seen>,
}

impl Settler {
    pub fn new(settle_seconds: f64) -> Settler {
        let ms = (settle_seconds * 1000.0).round().clamp(0.0, 1e12) as i64;
        Settler {
            settle: TimeDelta::milliseconds(ms),
            seen: HashMap::new(),
        }
    }

    /// Takes a fresh listing; returns the files that are ready, in listing
    /// order. Files no longer listed are forgotten.
    pub fn observe(
        &mut self,
        listing: &[(PathBuf, Signature)],
        now: DateTime<Utc>,
    ) -> Vec<PathBuf> {
        self.seen
            .retain(|p, _| listing.iter().any(|(q, _)| q.as_path() == p.as_path()));
        let mut ready = Vec::new();
        for (path, signature) in listing {
            let seen = self.seen.entry(path.clone()).or_insert(Seen {
                signature: *signature,
                since: now,
            });
            if seen.signature != *signature {
                *seen = Seen {
                    signature: *signature,
                    since: now,
                };
            }
            if !signature.regular || now - seen.since >= self.settle {
                ready.push(path.clone());
            }
        }
        ready
    }

    /// Files seen and not yet settled at `now`.
    pub fn settling(&self, now: DateTime<Utc>) -> usize {
        self.seen
            .values()
            .filter(|s| s.signature.regular && now - s.since < self.settle)
            .count()
    }

    /// All files currently tracked (settling or ready, not yet taken).
    pub fn tracked(&self) -> usize {
        self.seen.len()
    }

    /// Forget a file once it was taken (or went away).
    pub fn forget(&mut self, path: &Path) {
        self.seen.remove(path);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sig(len: u64, mtime: i128) -> Signature {
        Signature {
            len,
            mtime_ns: mtime,
            ino: 7,
            mode: 0o644,
            regular: true,
        }
    }

    fn at(ms: i64) -> DateTime<Utc> {
        DateTime::from_timestamp_millis(1_800_000_000_000 + ms).unwrap()
    }

    #[test]
    fn temp_hidden_and_partial_names_are_not_published() {
        assert!(is_published("night-01.csv"));
        assert!(is_published("data"));
        assert!(!is_published(".tmp"));
        assert!(!is_published(".night-01.csv"));
        assert!(!is_published("night-01.csv.part"));
    }

    #[test]
    fn a_file_is_ready_only_after_it_stayed_unchanged_for_the_settle_time() {
        let mut s = Settler::new(2.0);
        let p = PathBuf::from("/in/a.csv");
        assert!(s.observe(&[(p.clone(), sig(10, 1))], at(0)).is_empty());
        assert_eq!(s.settling(at(0)), 1);
        // Still growing: the clock starts again.
        assert!(s.observe(&[(p.clone(), sig(20, 2))], at(1500)).is_empty());
        assert!(s.observe(&[(p.clone(), sig(20, 2))], at(3000)).is_empty());
        assert_eq!(s.observe(&[(p.clone(), sig(20, 2))], at(3500)), vec![p]);
        assert_eq!(s.settling(at(3500)), 0);
    }

    #[test]
    fn a_touched_file_with_the_same_size_is_not_settled() {
        let mut s = Settler::new(1.0);
        let p = PathBuf::from("/in/a.csv");
        s.observe(&[(p.clone(), sig(10, 1))], at(0));
        assert!(s.observe(&[(p.clone(), sig(10, 5))], at(1000)).is_empty());
        assert_eq!(s.observe(&[(p.clone(), sig(10, 5))], at(2000)), vec![p]);
    }

    #[test]
    fn zero_settle_time_takes_files_at_first_sight_and_specials_never_wait() {
        let mut s = Settler::new(0.0);
        let p = PathBuf::from("/in/a.csv");
        assert_eq!(s.observe(&[(p.clone(), sig(10, 1))], at(0)), vec![p]);
        let mut s = Settler::new(60.0);
        let fifo = PathBuf::from("/in/pipe");
        let special = Signature {
            regular: false,
            ..sig(0, 0)
        };
        assert_eq!(s.observe(&[(fifo.clone(), special)], at(0)), vec![fifo]);
    }

    #[test]
    fn files_that_went_away_are_forgotten() {
        let mut s = Settler::new(1.0);
        let (a, b) = (PathBuf::from("/in/a"), PathBuf::from("/in/b"));
        s.observe(&[(a.clone(), sig(1, 1)), (b.clone(), sig(1, 1))], at(0));
        assert_eq!(s.tracked(), 2);
        s.observe(&[(b.clone(), sig(1, 1))], at(10));
        assert_eq!(s.tracked(), 1);
        // Reappearing starts a fresh wait.
        assert!(s.observe(&[(a.clone(), sig(1, 1))], at(1500)).is_empty());
        assert_eq!(s.settling(at(1500)), 1);
    }

    #[test]
    fn listing_skips_hidden_and_partial_names_and_lists_directories() {
        let dir = tempfile::tempdir().unwrap();
        fs::create_dir(dir.path().join(".tmp")).unwrap();
        fs::create_dir(dir.path().join("sub")).unwrap();
        fs::write(dir.path().join(".tmp/x.csv"), "a").unwrap();
        fs::write(dir.path().join("b.csv.part"), "a").unwrap();
        fs::write(dir.path().join(".hidden"), "a").unwrap();
        fs::write(dir.path().join("z.csv"), "zz").unwrap();
        fs::write(dir.path().join("a.csv"), "a").unwrap();
        let odd = |b: &[u8]| dir.path().join(std::ffi::OsStr::from_bytes(b));
        fs::write(odd(b".\xff.csv"), "a").unwrap();
        fs::write(odd(b"\xff.csv.part"), "a").unwrap();
        fs::write(odd(b"n\xff.csv"), "a").unwrap();
        let names: Vec<String> = list(dir.path())
            .unwrap()
            .into_iter()
            .map(|(p, _)| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names, ["a.csv", "n\u{fffd}.csv", "sub", "z.csv"]);
    }

    #[test]
    fn contents_name_what_waits_and_what_is_being_written() {
        let dir = tempfile::tempdir().unwrap();
        fs::create_dir(dir.path().join(".tmp")).unwrap();
        fs::create_dir(dir.path().join("sub")).unwrap();
        fs::write(dir.path().join(".tmp/x.csv"), "a").unwrap();
        fs::write(dir.path().join("b.csv.part"), "a").unwrap();
        fs::write(dir.path().join(".hidden"), "a").unwrap();
        fs::write(dir.path().join("a.csv"), "a").unwrap();
        let c = contents(dir.path()).unwrap();
        assert_eq!(c.waiting, ["a.csv", "sub"]);
        assert_eq!(c.being_written, [".hidden", ".tmp/x.csv", "b.csv.part"]);
        assert_eq!(
            contents(&dir.path().join("none")).unwrap(),
            Contents::default()
        );
    }
}
