//! The one path a file takes from disk into the store, used by the CLI's
//! `ingest` and by the daemon: read once, hash, check for a duplicate,
//! parse and validate, then store, refuse or set aside, with an audit entry
//! for each outcome.
//!
//! Order of effects for an accepted file, chosen so a crash at any point
//! loses nothing and stores nothing twice:
//! 1. the exact bytes read are written to `archive/.pending-<hash>.csv`;
//! 2. one store transaction commits rows, batch record, hash index,
//!    vocabulary, totals and the audit entry, then it is synced;
//! 3. the entry is appended to `audit.jsonl`;
//! 4. the pending file is renamed to `archive/<batch>.csv`;
//! 5. in inbox mode, the source file is removed.
//!
//! Start-up recovery (`settle_pending`) finishes step 4 for a pending file
//! whose hash is stored and deletes one whose transaction never happened.

use std::fs;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};
use serde::Serialize;

use crate::audit::{Entry, Event};
use crate::fsutil;
use crate::ids::BatchId;
use crate::ingest::{self, Limits, ReadError, Refusal};
use crate::state::{Owner, StateDir, StateError};
use crate::store::{BatchRecord, Split, Store};

/// What to do with the source file once it is dealt with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Source {
    /// A file in the inbox: it is removed once archived or set aside.
    Inbox,
    /// A file named on the command line: it is left where it is.
    Keep,
}

/// How one file ended.
#[derive(Debug, Clone)]
pub enum Outcome {
    Accepted {
        batch: Box<BatchRecord>,
        entry: Entry,
    },
    Duplicate {
        of: BatchId,
        entry: Entry,
    },
    Refused {
        refusal: Refusal,
        kept_as: Option<PathBuf>,
        entry: Entry,
    },
    /// The file was already stored by an ingest that was interrupted before
    /// archiving; archiving is now finished and nothing new was logged.
    Completed {
        batch: BatchId,
    },
    /// The file changed while it was read; it will be tried again later.
    NotReady {
        reason: String,
    },
}

impl Outcome {
    pub fn is_refused(&self) -> bool {
        matches!(self, Outcome::Refused { .. })
    }
}

/// The reasons written next to a refused file.
#[derive(Debug, Serialize)]
struct Why<'a> {
    file: &'a str,
    hash: Option<String>,
    refused_at: String,
    problems_total: usize,
    problems_listed: usize,
    problems: &'a [ingest::Problem],
    what_to_do: &'static str,
}

const WHAT_TO_DO: &str = "Nothing from this file was stored. Fix the listed rows (or the config), then publish the corrected file again; a file is taken whole or not at all.";

fn io_at(path: &Path) -> impl FnOnce(std::io::Error) -> StateError + '_ {
    move |source| StateError::Io {
        path: path.to_path_buf(),
        source,
    }
}

fn display_name(path: &Path) -> String {
    path.file_name().map_or_else(
        || path.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    )
}

/// The name a refused file's copy and reasons get under `refused/`: only
/// the path's last component, so nothing is written outside the state
/// dir. A path without one (`/`, `dir/..`) is kept as `unnamed`.
fn kept_name(path: &Path) -> String {
    path.file_name().map_or_else(
        || "unnamed".to_string(),
        |n| n.to_string_lossy().into_owned(),
    )
}

fn pending_path(state: &StateDir, hash: &blake3::Hash) -> PathBuf {
    state
        .archive()
        .join(format!(".pending-{}.csv", hash.to_hex()))
}

/// Path of an accepted batch's archived file.
pub fn archive_path(state: &StateDir, batch: BatchId) -> PathBuf {
    state.archive().join(format!("{batch}.csv"))
}

/// Takes one file through the whole path. Errors are failures of the
/// machine (I/O, store), never of the file: a bad file is an `Outcome`.
pub fn take_file(
    owner: &mut Owner,
    path: &Path,
    source: Source,
    user: &str,
    now: DateTime<Utc>,
) -> Result<Outcome, StateError> {
    let limits = Limits::of(&owner.config);
    let name = display_name(path);
    let raw = match ingest::read_file(path, limits.max_file_bytes) {
        Ok(r) => r,
        Err(ReadError::Changed { .. }) if source == Source::Inbox => {
            return Ok(Outcome::NotReady {
                reason: "the file changed while it was read".into(),
            });
        }
        Err(e) if e.is_refusal() => {
            let refusal = Refusal {
                problems: vec![ingest::Problem {
                    line: 0,
                    column: None,
                    field: None,
                    value: None,
                    reason: e.to_string(),
                }],
                total: 1,
            };
            return refuse(owner, path, &name, None, refusal, source, user, now);
        }
        Err(ReadError::Io { path, source }) => return Err(StateError::Io { path, source }),
        Err(e) => unreachable!("every other read error is a refusal: {e}"),
    };
    if let Some(of) = owner.store.batch_of_hash(&raw.hash)? {
        let archived = archive_path(&owner.state, of);
        if !archived.exists() {
            // Stored by an ingest that stopped before archiving: finish it.
            fsutil::write_new(&archived, &raw.bytes).map_err(io_at(&archived))?;
            let _ = fs::remove_file(pending_path(&owner.state, &raw.hash));
            remove_source(path, source)?;
            return Ok(Outcome::Completed { batch: of });
        }
        let kept = archive_path(&owner.state, of).with_extension("");
        let event = Event::BatchDuplicate {
            file: name,
            file_hash: raw.hash.to_hex().to_string(),
            duplicate_of: of,
        };
        let entry = owner.store.record(event, user, now)?;
        owner.mirror.append(&[entry.line().as_bytes()])?;
        if source == Source::Inbox {
            // Same bytes as the archived batch: moved beside it, named by
            // the batch and the log entry that recorded the duplicate.
            let dest = PathBuf::from(format!("{}.dup-{}.csv", kept.display(), entry.seq.0));
            fs::rename(path, &dest).map_err(io_at(path))?;
            fsutil::sync_dir(&owner.state.archive()).map_err(io_at(&dest))?;
            remove_source(path, source)?;
        }
        return Ok(Outcome::Duplicate { of, entry });
    }
    // The archive copy is written (and synced) on another thread while the
    // file is parsed and its drift measured; it must be on disk before the
    // store commits. A refused file's copy is removed again.
    let pending = pending_path(&owner.state, &raw.hash);
    std::thread::scope(|scope| {
        let writer = scope.spawn(|| fsutil::write_atomic(&pending, &raw.bytes));
        let steps = parse_and_measure(owner, &raw, &limits, path);
        let written = writer.join().expect("the archive writer panicked");
        let parsed = match steps {
            Ok(Ok(done)) => done,
            Ok(Err(refusal)) => {
                let _ = fs::remove_file(&pending);
                return refuse(owner, path, &name, Some(&raw), refusal, source, user, now);
            }
            Err(e) => {
                let _ = fs::remove_file(&pending);
                return Err(e);
            }
        };
        written
            .and_then(|()| crate::failpoint::hit("intake:after-pending"))
            .map_err(io_at(&pending))?;
        commit_and_archive(
            owner, path, source, &name, &raw, parsed, &pending, user, now,
        )
    })
}

/// A parsed file with what intake measured before storing it.
struct Parsed {
    batch: ingest::Batch,
    drift: Option<crate::drift::Measurement>,
    suspect: Option<crate::audit::SuspectEvidence>,
}

/// Parses and validates the file, measures its drift against the stored
/// training rows and runs the suspect-batch check. The outer error is the
/// machine's, the inner the file's.
fn parse_and_measure(
    owner: &Owner,
    raw: &ingest::RawFile,
    limits: &Limits,
    path: &Path,
) -> Result<Result<Parsed, Refusal>, StateError> {
    let batch = match ingest::parse(
        &raw.bytes,
        owner.store.schema(),
        owner.store.vocabularies(),
        limits,
    ) {
        Ok(b) => b,
        Err(refusal) => return Ok(Err(refusal)),
    };
    crate::failpoint::hit("intake:after-validate").map_err(io_at(path))?;
    // Drift against the stored training rows, kept in the batch's entry,
    // judged against the columns' past distances (kept in the store and
    // updated in the batch's own transaction).
    let drift = {
        // Both sides are thinned evenly: the tests' power is ample at the
        // default 20,000 rows, and the cost stays flat as the store grows.
        let max = owner.config.drift.max_reference_rows;
        let reference = owner.store.sample_rows(Split::Train, max)?;
        let mut rows = crate::drift::thin(&batch.train, max);
        rows.extend(&crate::drift::thin(&batch.holdout, max / 4));
        let mut vocabs = owner.store.vocabularies().clone();
        let known: std::collections::BTreeMap<usize, usize> =
            vocabs.iter().map(|(c, v)| (*c, v.len())).collect();
        for (col, values) in &batch.new_categories {
            let v = vocabs.entry(*col).or_default();
            for value in values {
                v.code_or_insert(value);
            }
        }
        let past = owner.store.drift_history()?;
        crate::drift::batch_report(
            owner.store.schema(),
            &vocabs,
            &known,
            &reference,
            &rows,
            &past,
            &owner.config.drift.rule(),
        )
    };
    // Before anything can train on it: is the data itself broken?
    let suspect = crate::suspect::check(owner, &batch)?;
    if let Some(s) = suspect.as_ref().filter(|s| s.suspect) {
        tracing::warn!(
            "{}: suspect, stored but set aside: {}",
            path.display(),
            s.why.join("; ")
        );
    }
    Ok(Ok(Parsed {
        batch,
        drift,
        suspect,
    }))
}

/// One transaction for the rows and their log entry, then the log mirror,
/// then the archive copy moved into place.
#[allow(clippy::too_many_arguments)]
fn commit_and_archive(
    owner: &mut Owner,
    path: &Path,
    source: Source,
    name: &str,
    raw: &ingest::RawFile,
    parsed: Parsed,
    pending: &Path,
    user: &str,
    now: DateTime<Utc>,
) -> Result<Outcome, StateError> {
    let (record, entry) = owner.store.commit_batch(
        &parsed.batch,
        name,
        &raw.hash,
        parsed.drift,
        parsed.suspect,
        user,
        now,
    )?;
    crate::failpoint::hit("intake:after-commit").map_err(io_at(&owner.state.audit()))?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    let archived = archive_path(&owner.state, record.id);
    crate::failpoint::hit("intake:after-audit").map_err(io_at(&archived))?;
    fs::rename(pending, &archived).map_err(io_at(&archived))?;
    fsutil::sync_dir(&owner.state.archive()).map_err(io_at(&archived))?;
    crate::failpoint::hit("intake:after-archive").map_err(io_at(&archived))?;
    remove_source(path, source)?;
    Ok(Outcome::Accepted {
        batch: Box::new(record),
        entry,
    })
}

#[allow(clippy::too_many_arguments)]
fn refuse(
    owner: &mut Owner,
    path: &Path,
    name: &str,
    raw: Option<&ingest::RawFile>,
    refusal: Refusal,
    source: Source,
    user: &str,
    now: DateTime<Utc>,
) -> Result<Outcome, StateError> {
    let refused = owner.state.refused();
    let hash = raw.map(|r| r.hash.to_hex().to_string());
    // Keep the refused bytes under the file's own name; a different file
    // that reuses the name gets its hash added rather than overwriting.
    let mut kept_as = None;
    let own = kept_name(path);
    if let Some(raw) = raw {
        let mut dest = refused.join(&own);
        let same = fs::read(&dest).map(|b| b == raw.bytes).unwrap_or(false);
        if dest.exists() && !same {
            let short = &raw.hash.to_hex()[..12];
            dest = refused.join(format!("{own}.{short}"));
        }
        fsutil::write_new(&dest, &raw.bytes).map_err(io_at(&dest))?;
        kept_as = Some(dest);
    } else if source == Source::Inbox {
        // Links, special and oversized files are moved aside unread.
        let mut dest = refused.join(&own);
        if fs::symlink_metadata(&dest).is_ok() {
            dest = refused.join(format!("{own}.{}", now.format("%Y%m%dT%H%M%S%.3f")));
        }
        fs::rename(path, &dest).map_err(io_at(path))?;
        // Both folders changed: without their fsync the link could be
        // back in the inbox after a power loss.
        fsutil::sync_dir(&refused).map_err(io_at(&refused))?;
        let inbox = fsutil::parent_dir(path);
        fsutil::sync_dir(inbox).map_err(io_at(inbox))?;
        kept_as = Some(dest);
    }
    let why_name = match &kept_as {
        Some(p) => format!("{}.why.json", display_name(p)),
        None => format!("{own}.why.json"),
    };
    let why_path = refused.join(&why_name);
    let why = Why {
        file: name,
        hash: hash.clone(),
        refused_at: now.to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        problems_total: refusal.total,
        problems_listed: refusal.problems.len(),
        problems: &refusal.problems,
        what_to_do: WHAT_TO_DO,
    };
    let mut text = serde_json::to_vec_pretty(&why).expect("plain data serialises");
    text.push(b'\n');
    fsutil::write_atomic(&why_path, &text).map_err(io_at(&why_path))?;
    let rel = |p: &Path| {
        p.strip_prefix(owner.state.root())
            .unwrap_or(p)
            .display()
            .to_string()
    };
    let event = Event::BatchRefused {
        file: name.to_string(),
        file_hash: hash.unwrap_or_default(),
        problems: refusal.total as u64,
        first_problem: refusal.first().to_string(),
        kept_as: kept_as.as_deref().map(rel),
    };
    let entry = owner.store.record(event, user, now)?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    if raw.is_some() {
        remove_source(path, source)?;
    }
    Ok(Outcome::Refused {
        refusal,
        kept_as,
        entry,
    })
}

fn remove_source(path: &Path, source: Source) -> Result<(), StateError> {
    if source == Source::Inbox {
        match fs::remove_file(path) {
            Ok(()) => {}
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
            Err(e) => return Err(io_at(path)(e)),
        }
        let dir = fsutil::parent_dir(path);
        fsutil::sync_dir(dir).map_err(io_at(dir))?;
    }
    Ok(())
}

/// Finishes or drops `archive/.pending-*` files left by a crash. Returns
/// (archived, dropped).
pub fn settle_pending(state: &StateDir, store: &Store) -> Result<(usize, usize), StateError> {
    let dir = state.archive();
    let mut counts = (0, 0);
    let entries = match fs::read_dir(&dir) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(counts),
        Err(e) => return Err(io_at(&dir)(e)),
    };
    for entry in entries {
        let entry = entry.map_err(io_at(&dir))?;
        let name = entry.file_name().to_string_lossy().into_owned();
        let Some(hex) = name
            .strip_prefix(".pending-")
            .and_then(|n| n.strip_suffix(".csv"))
        else {
            continue;
        };
        let batch = match blake3::Hash::from_hex(hex) {
            Ok(h) => store.batch_of_hash(&h)?,
            Err(_) => None,
        };
        match batch {
            Some(id) if !archive_path(state, id).exists() => {
                fs::rename(entry.path(), archive_path(state, id)).map_err(io_at(&entry.path()))?;
                counts.0 += 1;
            }
            _ => {
                fs::remove_file(entry.path()).map_err(io_at(&entry.path()))?;
                counts.1 += 1;
            }
        }
    }
    if counts != (0, 0) {
        fsutil::sync_dir(&dir).map_err(io_at(&dir))?;
    }
    Ok(counts)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    const SMALL: &str = include_str!("../tests/data/small.toml");

    #[test]
    fn a_refused_link_leaves_the_inbox_durably() {
        let dir = tempfile::tempdir().unwrap();
        let state = StateDir::new(dir.path().join("state"));
        let config = Config::parse(SMALL, Path::new("small.toml")).unwrap();
        let mut owner = crate::state::create(&state, &config, SMALL, "ana").unwrap();
        let target = dir.path().join("elsewhere.csv");
        fs::write(&target, "id,city,temp,flag,y\n").unwrap();
        let link = state.inbox().join("night.csv");
        std::os::unix::fs::symlink(&target, &link).unwrap();
        fsutil::SYNCED_DIRS.with(|s| s.borrow_mut().clear());
        let outcome = take_file(&mut owner, &link, Source::Inbox, "ana", Utc::now()).unwrap();
        assert!(outcome.is_refused(), "{outcome:?}");
        assert!(
            fs::symlink_metadata(&link).is_err(),
            "the link left the inbox"
        );
        let synced = fsutil::SYNCED_DIRS.with(|s| s.borrow().clone());
        for folder in [state.inbox(), state.refused()] {
            assert!(
                synced.contains(&folder),
                "{} was not synced after the move: {synced:?}",
                folder.display()
            );
        }
    }
}
