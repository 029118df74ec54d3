//! Consistent copies of a state dir and their restoration.
//!
//! A backup is taken by the state dir's owner (the CLI holding `LOCK`, or
//! the daemon in its own loop, so no write happens meanwhile): first a
//! `backup-made` entry is logged, so the copy holds its own record; then
//! the store is copied tree by tree into a fresh store, the files are
//! copied and hashed, and `backup.json` (the manifest with every file's
//! blake3) is written last: a folder without it is not a finished backup.
//!
//! Restoring checks every hash first, builds the state dir beside its
//! destination, renames it into place, opens it (start-up recovery), logs a
//! `restored` entry and runs the full `verify`.

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::audit::Event;
use crate::config::Config;
use crate::fsutil;
use crate::state::{self, Owner, StateDir, StateError};
use crate::store::StoreError;

pub const MANIFEST: &str = "backup.json";
const FORMAT: u32 = 1;

/// Folders copied file by file (the store is copied by `Store::copy_to`).
/// ("rejected" is the refused files' folder in state dirs from before the name
/// was settled: copied as it is, moved by the restored dir's first owner.)
const FOLDERS: [&str; 5] = ["archive", "refused", "rejected", "models", "rows"];
/// Single files copied when present.
const FILES: [&str; 3] = ["tidegate.toml", "audit.jsonl", "serving"];

#[derive(Debug, thiserror::Error)]
pub enum BackupError {
    #[error("{path}: {what}")]
    Refused { path: PathBuf, what: String },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(transparent)]
    State(#[from] StateError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Audit(#[from] crate::audit::MirrorError),
    #[error("the restored state dir does not verify: {0}")]
    Verify(String),
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> BackupError + '_ {
    move |source| BackupError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// What `backup.json` records.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    pub format: u32,
    pub created_at: String,
    pub created_by: String,
    /// The `backup-made` entry, the last one the copy holds.
    pub audit_seq: u64,
    pub batches: u64,
    pub rows: u64,
    pub serving: Option<crate::ids::ModelId>,
    /// Key-value pairs in the copied store.
    pub store_pairs: u64,
    /// blake3 of every copied file, by path relative to the backup.
    pub files: BTreeMap<String, String>,
}

/// A folder that is absent or empty may receive a backup or a restore.
fn usable_destination(dir: &Path) -> Result<(), BackupError> {
    match fs::read_dir(dir) {
        Ok(mut entries) => {
            if entries.next().is_some() {
                return Err(BackupError::Refused {
                    path: dir.to_path_buf(),
                    what: "exists and is not empty; name a new folder".into(),
                });
            }
            Ok(())
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(()),
        Err(e) => Err(io(dir)(e)),
    }
}

fn make_dir(dir: &Path) -> Result<(), BackupError> {
    use std::os::unix::fs::DirBuilderExt;
    fs::DirBuilder::new()
        .recursive(true)
        .mode(0o700)
        .create(dir)
        .map_err(io(dir))
}

/// Copies regular files under `from` to `to` (recursively), hashing each;
/// links and special files are skipped (the state dir never holds any).
fn copy_tree(
    from: &Path,
    to: &Path,
    rel: &str,
    hashes: &mut BTreeMap<String, String>,
) -> Result<(), BackupError> {
    make_dir(to)?;
    let mut entries: Vec<_> = fs::read_dir(from)
        .map_err(io(from))?
        .collect::<Result<_, _>>()
        .map_err(io(from))?;
    entries.sort_by_key(|e| e.file_name());
    for entry in entries {
        let name = entry.file_name().to_string_lossy().into_owned();
        let src = entry.path();
        let dst = to.join(&name);
        let kind = entry.file_type().map_err(io(&src))?;
        let rel_name = format!("{rel}/{name}");
        if kind.is_dir() {
            copy_tree(&src, &dst, &rel_name, hashes)?;
        } else if kind.is_file() {
            hashes.insert(rel_name, copy_file(&src, &dst)?);
        }
    }
    fsutil::sync_dir(to).map_err(io(to))?;
    Ok(())
}

fn copy_file(src: &Path, dst: &Path) -> Result<String, BackupError> {
    let bytes = fs::read(src).map_err(io(src))?;
    fsutil::write_atomic(dst, &bytes).map_err(io(dst))?;
    Ok(blake3::hash(&bytes).to_hex().to_string())
}

/// Takes a backup of the owned state dir into `out` (absent or empty).
pub fn backup(owner: &mut Owner, out: &Path, user: &str) -> Result<Manifest, BackupError> {
    usable_destination(out)?;
    let totals = owner.store.totals().clone();
    let serving = owner.store.serving()?;
    let entry = owner.store.record(
        Event::BackupMade {
            out: out.display().to_string(),
            batches: totals.batches,
            rows: totals.train_rows + totals.holdout_rows,
        },
        user,
        chrono::Utc::now(),
    )?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    make_dir(out)?;
    let store_pairs = owner.store.copy_to(&out.join("store"))?;
    let mut files = BTreeMap::new();
    let root = owner.state.root().to_path_buf();
    for name in FILES {
        let src = root.join(name);
        if src.is_file() {
            files.insert(name.to_string(), copy_file(&src, &out.join(name))?);
        }
    }
    for folder in FOLDERS {
        let src = root.join(folder);
        if src.is_dir() {
            copy_tree(&src, &out.join(folder), folder, &mut files)?;
        }
    }
    let manifest = Manifest {
        format: FORMAT,
        created_at: entry.time.clone(),
        created_by: user.to_string(),
        audit_seq: entry.seq.0,
        batches: totals.batches,
        rows: totals.train_rows + totals.holdout_rows,
        serving,
        store_pairs,
        files,
    };
    let mut text = serde_json::to_vec_pretty(&manifest).expect("manifest serialises");
    text.push(b'\n');
    fsutil::write_atomic(&out.join(MANIFEST), &text).map_err(io(&out.join(MANIFEST)))?;
    fsutil::sync_dir(out).map_err(io(out))?;
    Ok(manifest)
}

/// Reads a backup's manifest and checks every file against it.
pub fn check(from: &Path) -> Result<Manifest, BackupError> {
    let path = from.join(MANIFEST);
    let bytes = fs::read(&path).map_err(|e| {
        if e.kind() == std::io::ErrorKind::NotFound {
            BackupError::Refused {
                path: from.to_path_buf(),
                what: format!("has no {MANIFEST}: not a finished backup"),
            }
        } else {
            io(&path)(e)
        }
    })?;
    let manifest: Manifest = serde_json::from_slice(&bytes).map_err(|e| BackupError::Refused {
        path: path.clone(),
        what: format!("not a backup manifest: {e}"),
    })?;
    if manifest.format != FORMAT {
        return Err(BackupError::Refused {
            path,
            what: format!(
                "format {} is not one this version reads ({FORMAT})",
                manifest.format
            ),
        });
    }
    for (rel, want) in &manifest.files {
        let file = from.join(rel);
        let got = fs::read(&file)
            .map(|b| blake3::hash(&b).to_hex().to_string())
            .map_err(io(&file))?;
        if &got != want {
            return Err(BackupError::Refused {
                path: file,
                what: "does not match the hash in the backup's manifest (changed or damaged)"
                    .into(),
            });
        }
    }
    if !from.join("store").is_dir() {
        return Err(BackupError::Refused {
            path: from.join("store"),
            what: "missing: the backup has no store".into(),
        });
    }
    Ok(manifest)
}

/// Restores the backup in `from` as the state dir `into` (absent or empty).
pub fn restore(
    from: &Path,
    into: &StateDir,
    user: &str,
) -> Result<(Manifest, crate::verify::Report), BackupError> {
    let manifest = check(from)?;
    let dest = into.root();
    usable_destination(dest)?;
    let name = dest
        .file_name()
        .map_or_else(|| "state".into(), |n| n.to_string_lossy().into_owned());
    let staging = dest.with_file_name(format!(".{name}.restoring-{}", std::process::id()));
    if staging.exists() {
        fs::remove_dir_all(&staging).map_err(io(&staging))?;
    }
    make_dir(&staging)?;
    copy_tree(
        &from.join("store"),
        &staging.join("store"),
        "store",
        &mut BTreeMap::new(),
    )?;
    let mut copied = BTreeMap::new();
    for name in FILES {
        let src = from.join(name);
        if src.is_file() {
            copy_file(&src, &staging.join(name))?;
        }
    }
    for folder in FOLDERS {
        let src = from.join(folder);
        if src.is_dir() {
            copy_tree(&src, &staging.join(folder), folder, &mut copied)?;
        }
    }
    for dir in [staging.join("inbox"), staging.join("inbox/.tmp")] {
        make_dir(&dir)?;
    }
    if dest.exists() {
        fs::remove_dir(dest).map_err(io(dest))?;
    }
    fs::rename(&staging, dest).map_err(io(dest))?;
    if let Some(parent) = dest.parent().filter(|p| !p.as_os_str().is_empty()) {
        fsutil::sync_dir(parent).map_err(io(parent))?;
    }
    let config = Config::load(&into.config()).map_err(|e| BackupError::Refused {
        path: into.config(),
        what: e.to_string(),
    })?;
    let (mut owner, _) = state::open(into, &config)?;
    let entry = owner.store.record(
        Event::Restored {
            from: from.display().to_string(),
            backup_created_at: manifest.created_at.clone(),
            backup_seq: manifest.audit_seq,
        },
        user,
        chrono::Utc::now(),
    )?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    let report = crate::verify::check(&owner)?.map_err(|p| BackupError::Verify(p.to_string()))?;
    Ok((manifest, report))
}
