//! `verify`: checks that the state dir is what its audit log says it is.
//!
//! In order, stopping at the first problem: the chain of `audit.jsonl` is
//! intact and contiguous; every line equals the store's copy of that entry
//! and neither has entries the other lacks; every accepted batch in the log
//! has a store record with the same file hash and row counts, its rows are
//! all in the store, and its archived file still has those bytes; the
//! store's totals equal the sum over its batches; every checkpoint a cycle
//! logged still has the manifest it was logged with, and its files match
//! the hashes in that manifest; with an ONNX export configured, the file
//! is the serving model's export byte for byte and the log recorded it.

use std::collections::BTreeMap;

use crate::audit::{self, Event};
use crate::ids::BatchId;
use crate::intake;
use crate::state::{Owner, StateError};
use crate::store::Split;

/// What an intact state dir holds.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Report {
    pub audit_entries: u64,
    pub batches: u64,
    pub rows: u64,
    pub checkpoints: u64,
}

/// The first thing found wrong.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Problem {
    /// Audit sequence number the problem belongs to, when it belongs to one.
    pub seq: Option<u64>,
    pub what: String,
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.seq {
            Some(s) => write!(f, "audit entry #{s}: {}", self.what),
            None => f.write_str(&self.what),
        }
    }
}

fn problem(seq: Option<u64>, what: impl Into<String>) -> Problem {
    Problem {
        seq,
        what: what.into(),
    }
}

/// Runs every check. `Err` is a machine failure (I/O); a damaged state dir
/// is `Ok(Err(problem))`.
pub fn check(owner: &Owner) -> Result<Result<Report, Problem>, StateError> {
    let lines = owner.mirror.read_lines()?;
    let entries = match audit::verify_chain(lines.iter().map(Vec::as_slice)) {
        Ok(e) => e,
        Err(p) => return Ok(Err(problem(Some(p.seq), p.reason))),
    };
    let stored = owner.store.audit_entries()?;
    for (i, (seq, line)) in stored.iter().enumerate() {
        let expected = i as u64 + 1;
        if seq.0 != expected {
            return Ok(Err(problem(
                Some(expected),
                "the store's audit tree skips this entry",
            )));
        }
        match lines.get(i) {
            None => {
                return Ok(Err(problem(
                    Some(expected),
                    "in the store but missing from audit.jsonl (after a crash the next start of an owner re-appends it; otherwise lines were removed)",
                )));
            }
            Some(l) if l != line => {
                return Ok(Err(problem(
                    Some(expected),
                    "audit.jsonl and the store's copy of this entry differ",
                )));
            }
            Some(_) => {}
        }
    }
    if lines.len() > stored.len() {
        return Ok(Err(problem(
            Some(stored.len() as u64 + 1),
            "in audit.jsonl but not in the store: the entry was added to the file by hand",
        )));
    }
    let records: BTreeMap<BatchId, _> = owner
        .store
        .batches()?
        .into_iter()
        .map(|b| (b.id, b))
        .collect();
    let mut seen = 0u64;
    let mut checkpoints = 0u64;
    let mut rows_total = 0u64;
    let files_by_log = audit::row_files(&entries);
    for e in &entries {
        let Event::BatchAccepted {
            batch,
            file_hash,
            train_rows,
            holdout_rows,
            ..
        } = &e.event
        else {
            continue;
        };
        let seq = Some(e.seq.0);
        let Some(rec) = records.get(batch) else {
            return Ok(Err(problem(
                seq,
                format!("batch {batch} is logged as accepted but the store has no record of it"),
            )));
        };
        if &rec.hash != file_hash
            || rec.train_rows != *train_rows
            || rec.holdout_rows != *holdout_rows
        {
            return Ok(Err(problem(
                seq,
                format!(
                    "batch {batch}: the store's record (hash, row counts) differs from the log"
                ),
            )));
        }
        if let Err(why) = check_row_file(&owner.store, rec, files_by_log.get(batch)) {
            return Ok(Err(problem(seq, why)));
        }
        for (split, want) in [
            (Split::Train, rec.train_rows),
            (Split::Holdout, rec.holdout_rows),
        ] {
            let have = owner.store.batch_rows(split, *batch)?.n_rows() as u64;
            if have != want {
                return Ok(Err(problem(
                    seq,
                    format!(
                        "batch {batch}: {have} {split:?} rows stored where {want} were accepted"
                    ),
                )));
            }
        }
        let archived = intake::archive_path(&owner.state, *batch);
        match std::fs::read(&archived) {
            Ok(bytes) if blake3::hash(&bytes).to_hex().as_str() == file_hash => {}
            Ok(_) => {
                return Ok(Err(problem(
                    seq,
                    format!(
                        "{} no longer holds the bytes of batch {batch}",
                        archived.display()
                    ),
                )));
            }
            Err(e) => return Ok(Err(problem(seq, format!("{}: {e}", archived.display())))),
        }
        seen += 1;
        rows_total += rec.rows();
    }
    // Which batches are set aside, by the log (a suspect batch at intake,
    // then by hand), must be what the store's records say.
    let mut aside_by_log: BTreeMap<BatchId, (u64, bool)> = BTreeMap::new();
    for e in &entries {
        match &e.event {
            Event::BatchAccepted {
                batch,
                suspect: Some(s),
                ..
            } if s.suspect => {
                aside_by_log.insert(*batch, (e.seq.0, true));
            }
            Event::BatchSetAside { batch, .. } => {
                aside_by_log.insert(*batch, (e.seq.0, true));
            }
            Event::BatchBroughtBack { batch, .. } => {
                aside_by_log.insert(*batch, (e.seq.0, false));
            }
            _ => {}
        }
    }
    for rec in records.values() {
        let by_log = aside_by_log.get(&rec.id).copied();
        let consistent = match (&rec.set_aside, by_log) {
            (None, None) | (None, Some((_, false))) => true,
            (Some(a), Some((seq, true))) => a.audit_seq.0 == seq,
            _ => false,
        };
        if !consistent {
            return Ok(Err(problem(
                by_log.map(|(seq, _)| seq),
                format!(
                    "batch {}: the store says it is {}set aside, the log says otherwise",
                    rec.id,
                    if rec.set_aside.is_some() { "" } else { "not " }
                ),
            )));
        }
    }
    // Every checkpoint a cycle recorded still has the files it was saved with.
    for e in &entries {
        let Event::CandidateTrained {
            model,
            manifest_hash,
            ..
        } = &e.event
        else {
            continue;
        };
        let seq = Some(e.seq.0);
        let dir = crate::model::checkpoint::model_dir(&owner.state.models(), *model);
        match std::fs::read(dir.join(crate::model::checkpoint::MANIFEST_FILE)) {
            Ok(bytes) if blake3::hash(&bytes).to_hex().as_str() == manifest_hash => {}
            Ok(_) => {
                return Ok(Err(problem(
                    seq,
                    format!("the manifest of model {model} changed since it was logged"),
                )));
            }
            Err(e) => return Ok(Err(problem(seq, format!("model {model}: {e}")))),
        }
        if let Err(err) = crate::model::checkpoint::verify(&dir) {
            return Ok(Err(problem(seq, format!("model {model}: {err}"))));
        }
        checkpoints += 1;
    }
    if seen != records.len() as u64 {
        return Ok(Err(problem(
            None,
            format!(
                "the store holds {} batches but the log accepts {seen}",
                records.len()
            ),
        )));
    }
    let totals = owner.store.totals();
    if totals.batches != seen || totals.train_rows + totals.holdout_rows != rows_total {
        return Ok(Err(problem(
            None,
            "the store's totals differ from the sum over its batches",
        )));
    }
    if let Some(what) = crate::export::check(owner)? {
        return Ok(Err(problem(None, what)));
    }
    Ok(Ok(Report {
        audit_entries: entries.len() as u64,
        batches: seen,
        rows: rows_total,
        checkpoints,
    }))
}

/// A batch's row file against the log: the store's record names the file
/// the last writing entry logged, and the file still has the bytes whose
/// hash that entry recorded. A store from before row files (its rows still
/// in chunks, the log naming no file) passes.
fn check_row_file(
    store: &crate::store::Store,
    rec: &crate::store::BatchRecord,
    logged: Option<&(crate::ids::AuditSeq, crate::rowfile::FileRef)>,
) -> Result<(), String> {
    let batch = rec.id;
    match (&rec.rows_file, logged) {
        (None, None) => Ok(()),
        (None, Some((seq, _))) => Err(format!(
            "batch {batch}: entry {} logged a row file, the store's record names none",
            seq.0
        )),
        (Some(f), None) => Err(format!(
            "batch {batch}: the store's record names row file {}, which no audit entry logged",
            f.name
        )),
        (Some(f), Some((seq, want))) => {
            let seq = seq.0;
            if f != want {
                return Err(format!(
                    "batch {batch}: the store's record names row file {}, entry {seq} logged {}",
                    f.name, want.name
                ));
            }
            let path = store.row_file_path(f);
            match std::fs::read(&path) {
                Ok(bytes) if blake3::hash(&bytes).to_hex().as_str() == want.hash => Ok(()),
                Ok(_) => Err(format!(
                    "{} no longer holds the rows of batch {batch} (its blake3 differs from the one entry {seq} logged)",
                    path.display()
                )),
                Err(e) => Err(format!("{}: {e}", path.display())),
            }
        }
    }
}
