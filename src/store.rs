//! The only user of sled, and the keeper of the row files: typed keys,
//! trees, one transaction per change, durable flushes, and the read-back
//! API for rows.
//!
//! Rows live in one Parquet file per accepted batch in the `rows/` folder
//! beside the store (`rowfile` has the layout). A file is written and
//! fsynced before the transaction that records it in the batch record and
//! the audit entry; a file that no batch record names (a crash between the
//! two) is deleted by the next owner's start (`drop_unnamed_row_files`).
//! sled keeps the index, vocabularies, running statistics, the serving
//! pointer and the audit tree.
//!
//! Stores written before row files kept rows in the `chunks` tree; they
//! are read as before until the owner's start moves each batch to a file
//! (`move_rows_to_files`, one transaction and one `rows-written` entry per
//! batch, so a crash at any point leaves every batch in one place or the
//! other).
//!
//! Trees and their keys (integers big-endian, so scans come back in order):
//!
//! | tree      | key                                   | value                          |
//! |-----------|---------------------------------------|--------------------------------|
//! | `meta`    | name                                  | JSON or u64                    |
//! | `meta`    | `drift_history/` + column name        | JSON `drift::PastDistances`    |
//! | `meta`    | `arrival/` + `ModelId`                | previous `ModelId` (0: none), rollback byte |
//! | `batches` | `BatchId`                             | JSON `BatchRecord`             |
//! | `hashes`  | blake3 of the file (32 bytes)         | `BatchId`                      |
//! | `chunks`  | `BatchId`, split byte, chunk `u32`    | cells, little-endian `u32`s (stores from before row files, until moved) |
//! | `vocab`   | column `u32`, code `u32`              | the category text              |
//! | `audit`   | `AuditSeq`                            | the entry's JSON line          |
//!
//! Every value stays under 64 KiB so sled never writes separate blob files.
//! Before sled opens, an unfinished snapshot a crash left behind is removed
//! (see `remove_unfinished_snapshots`).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use sled::transaction::{ConflictableTransactionError, TransactionError, TransactionalTree};
use sled::{Transactional, Tree};

use crate::audit::{self, Entry, Event};
use crate::ids::{AuditSeq, BatchId, ModelId};
use crate::ingest::Batch;
use crate::rowfile::{self, FileRef, RowFile, RowFileError};
use crate::schema::{ColumnStats, RowMatrix, Schema, Vocab, Vocabularies};

/// Which side of the holdout split.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Split {
    Train,
    Holdout,
}

impl Split {
    fn byte(self) -> u8 {
        match self {
            Split::Train => 0,
            Split::Holdout => 1,
        }
    }
}

/// What the store knows about one accepted batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BatchRecord {
    pub id: BatchId,
    pub file: String,
    pub hash: String,
    pub accepted_at: String,
    pub train_rows: u64,
    pub holdout_rows: u64,
    pub audit_seq: AuditSeq,
    /// Number-column statistics of the batch's training rows.
    pub train_stats: ColumnStats,
    /// The batch's row file in `rows/`; absent in a store from before row
    /// files until its rows are moved (their chunks are read meanwhile).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rows_file: Option<FileRef>,
    /// Set when the batch is set aside: stored, but not read by training,
    /// holdout scoring, baselines, drift or the fresh-data check. Absent in
    /// records written before batches could be set aside.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub set_aside: Option<SetAside>,
}

impl BatchRecord {
    pub fn rows(&self) -> u64 {
        self.train_rows + self.holdout_rows
    }

    pub fn is_set_aside(&self) -> bool {
        self.set_aside.is_some()
    }
}

/// Why and by whom a batch was set aside.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SetAside {
    /// `true`: by the suspect-batch check at intake; `false`: by hand.
    pub automatic: bool,
    pub reason: String,
    pub by: String,
    pub at: String,
    /// The audit entry that set it aside.
    pub audit_seq: AuditSeq,
}

/// Totals kept up to date in the same transaction as each batch.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Totals {
    pub batches: u64,
    pub train_rows: u64,
    pub holdout_rows: u64,
    /// Number-column statistics over all training rows.
    pub train_stats: ColumnStats,
}

/// Store failures. Any of them means the process should stop: sled I/O
/// errors and fsync failures are not retried.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("state dir {path} is in use by PID {pid}; stop that process or send the command to it")]
    Locked { path: PathBuf, pid: String },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("store {path}: {source}")]
    Sled {
        path: PathBuf,
        #[source]
        source: sled::Error,
    },
    #[error("store {path} is damaged: {what}; run `tidegate verify` and restore from a backup")]
    Corrupt { path: PathBuf, what: String },
    #[error(
        "store {path} was created for a different schema (fingerprint {stored}, config has {config}); put the old config back or run `tidegate migrate`"
    )]
    SchemaChanged {
        path: PathBuf,
        stored: String,
        config: String,
    },
    #[error("{path} is not an initialised state dir; run `tidegate init --config FILE` first")]
    NotInitialised { path: PathBuf },
}

/// The open store of one state dir. Holding it means holding `state/LOCK`.
pub struct Store {
    path: PathBuf,
    /// The row files' folder (`rows/` beside the store's folder).
    rows_dir: PathBuf,
    db: sled::Db,
    meta: Tree,
    batches: Tree,
    hashes: Tree,
    chunks: Tree,
    vocab: Tree,
    audit: Tree,
    schema: Schema,
    vocabs: Vocabularies,
    totals: Totals,
    /// Batches set aside (from their records; kept in step by every change).
    aside: std::collections::BTreeSet<BatchId>,
    last_audit: Option<(AuditSeq, String)>,
}

const META_SCHEMA: &[u8] = b"schema";
const META_FINGERPRINT: &[u8] = b"schema_fingerprint";
const META_TOTALS: &[u8] = b"totals";
/// A change to one `meta` key: `Some(value)` sets it, `None` removes it.
pub type MetaChange<'a> = (&'a [u8], Option<Vec<u8>>);

/// `ModelId` of the serving model.
pub const META_SERVING: &[u8] = b"serving";
/// `ModelId` the next trained model gets.
pub const META_NEXT_MODEL: &[u8] = b"next_model";
/// Retrain cycles started so far (u64, big-endian).
pub const META_CYCLES: &[u8] = b"cycles";
/// The cycle that started and has not ended (u64, big-endian).
pub const META_OPEN_CYCLE: &[u8] = b"open_cycle";
/// Prefix of the per-column keys holding past batches' drift distances
/// (at most `drift::MAX_WINDOW` numbers each, so far below 64 KiB). A store
/// without them (written by an older version) starts with empty histories.
pub const META_DRIFT_HISTORY: &[u8] = b"drift_history/";
/// Prefix of the keys saying how each model last came to serve (see
/// [`Store::arrival`]); written by the transaction of the entry that moved
/// the serving pointer, so they always agree with the log.
pub const META_ARRIVAL: &[u8] = b"arrival/";

fn arrival_key(model: ModelId) -> Vec<u8> {
    [META_ARRIVAL, &model.key()[..]].concat()
}

fn encode_arrival(previous: Option<ModelId>, by_rollback: bool) -> Vec<u8> {
    let mut v = previous.map_or([0; 8], |p| p.key()).to_vec();
    v.push(u8::from(by_rollback));
    v
}

impl Store {
    /// Creates a new store at `path` (which must not exist yet).
    pub fn create(path: &Path, schema: &Schema, fingerprint: &str) -> Result<Store, StoreError> {
        if path.join("db").exists() {
            return Err(StoreError::Corrupt {
                path: path.to_path_buf(),
                what: "a store already exists here".into(),
            });
        }
        let store = Store::open_raw(path, schema.clone())?;
        let sl = |e| StoreError::Sled {
            path: path.to_path_buf(),
            source: e,
        };
        store.meta.insert(META_SCHEMA, json(schema)).map_err(sl)?;
        store
            .meta
            .insert(META_FINGERPRINT, fingerprint.as_bytes())
            .map_err(sl)?;
        store
            .meta
            .insert(META_TOTALS, json(&Totals::default()))
            .map_err(sl)?;
        store.sync()?;
        Ok(store)
    }

    /// Opens an existing store and checks it was made for this schema.
    pub fn open(path: &Path, schema: &Schema, fingerprint: &str) -> Result<Store, StoreError> {
        if !path.join("db").exists() && !path.join("conf").exists() {
            return Err(StoreError::NotInitialised {
                path: path.to_path_buf(),
            });
        }
        let mut store = Store::open_raw(path, schema.clone())?;
        let stored = store
            .meta
            .get(META_FINGERPRINT)
            .map_err(|e| store.sled_err(e))?;
        let stored = stored
            .map(|v| String::from_utf8_lossy(&v).into_owned())
            .unwrap_or_default();
        if stored != fingerprint {
            return Err(StoreError::SchemaChanged {
                path: path.to_path_buf(),
                stored,
                config: fingerprint.to_string(),
            });
        }
        store.load_state()?;
        Ok(store)
    }

    fn open_raw(path: &Path, schema: Schema) -> Result<Store, StoreError> {
        remove_unfinished_snapshots(path)?;
        let sl = |e| StoreError::Sled {
            path: path.to_path_buf(),
            source: e,
        };
        let db = open_sled(path).map_err(sl)?;
        let tree = |name: &str| db.open_tree(name).map_err(sl);
        Ok(Store {
            path: path.to_path_buf(),
            rows_dir: rows_dir_of(path),
            meta: tree("meta")?,
            batches: tree("batches")?,
            hashes: tree("hashes")?,
            chunks: tree("chunks")?,
            vocab: tree("vocab")?,
            audit: tree("audit")?,
            db,
            schema,
            vocabs: Vocabularies::new(),
            totals: Totals::default(),
            aside: Default::default(),
            last_audit: None,
        })
    }

    fn sled_err(&self, source: sled::Error) -> StoreError {
        StoreError::Sled {
            path: self.path.clone(),
            source,
        }
    }

    fn row_file_err(&self, e: RowFileError) -> StoreError {
        match e {
            RowFileError::Io { path, source } => StoreError::Io { path, source },
            RowFileError::Bad { path, what } => StoreError::Corrupt { path, what },
        }
    }

    fn corrupt(&self, what: impl Into<String>) -> StoreError {
        StoreError::Corrupt {
            path: self.path.clone(),
            what: what.into(),
        }
    }

    fn load_state(&mut self) -> Result<(), StoreError> {
        let totals = self
            .meta
            .get(META_TOTALS)
            .map_err(|e| self.sled_err(e))?
            .ok_or_else(|| self.corrupt("meta has no totals"))?;
        self.totals =
            serde_json::from_slice(&totals).map_err(|e| self.corrupt(format!("totals: {e}")))?;
        let mut vocabs = BTreeMap::<usize, Vec<String>>::new();
        for kv in self.vocab.iter() {
            let (k, v) = kv.map_err(|e| self.sled_err(e))?;
            let (col, code) = (u32_at(&k, 0), u32_at(&k, 4));
            let values = vocabs.entry(col as usize).or_default();
            if code as usize != values.len() {
                return Err(self.corrupt(format!(
                    "vocabulary of column {col} skips code {}",
                    values.len()
                )));
            }
            values.push(String::from_utf8_lossy(&v).into_owned());
        }
        self.vocabs = vocabs
            .into_iter()
            .map(|(c, v)| (c, Vocab::from_values(v)))
            .collect();
        self.aside = self
            .batches()?
            .into_iter()
            .filter(BatchRecord::is_set_aside)
            .map(|r| r.id)
            .collect();
        if let Some(kv) = self.audit.last().map_err(|e| self.sled_err(e))? {
            let seq = AuditSeq::from_key(&kv.0).ok_or_else(|| self.corrupt("bad audit key"))?;
            let entry = Entry::from_line(&kv.1)
                .map_err(|e| self.corrupt(format!("audit entry {seq}: {e}")))?;
            self.last_audit = Some((seq, entry.hash));
        }
        Ok(())
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    pub fn schema(&self) -> &Schema {
        &self.schema
    }

    pub fn vocabularies(&self) -> &Vocabularies {
        &self.vocabs
    }

    pub fn totals(&self) -> &Totals {
        &self.totals
    }

    /// Batches set aside, in order.
    pub fn set_aside_batches(&self) -> &std::collections::BTreeSet<BatchId> {
        &self.aside
    }

    /// Number-column statistics over the training rows of the batches not
    /// set aside (what models are standardised with).
    pub fn train_stats(&self) -> Result<ColumnStats, StoreError> {
        if self.aside.is_empty() {
            return Ok(self.totals.train_stats.clone());
        }
        Ok(self
            .records_in(None, None, false)?
            .iter()
            .fold(ColumnStats::default(), |acc, r| acc.merge(&r.train_stats)))
    }

    /// The batch a file hash was accepted as, if any.
    pub fn batch_of_hash(&self, hash: &blake3::Hash) -> Result<Option<BatchId>, StoreError> {
        let v = self
            .hashes
            .get(hash.as_bytes())
            .map_err(|e| self.sled_err(e))?;
        Ok(v.and_then(|v| BatchId::from_key(&v)))
    }

    pub fn batch(&self, id: BatchId) -> Result<Option<BatchRecord>, StoreError> {
        let v = self.batches.get(id.key()).map_err(|e| self.sled_err(e))?;
        v.map(|v| serde_json::from_slice(&v).map_err(|e| self.corrupt(format!("batch {id}: {e}"))))
            .transpose()
    }

    /// All accepted batches in order.
    pub fn batches(&self) -> Result<Vec<BatchRecord>, StoreError> {
        self.batches
            .iter()
            .map(|kv| {
                let (_, v) = kv.map_err(|e| self.sled_err(e))?;
                serde_json::from_slice(&v).map_err(|e| self.corrupt(format!("batch record: {e}")))
            })
            .collect()
    }

    pub fn next_batch_id(&self) -> BatchId {
        BatchId(self.totals.batches + 1)
    }

    /// About `max` rows of one side of the split, spread evenly over the
    /// whole store (set-aside batches left out): only the row groups that
    /// hold the chosen rows are decoded, so the cost grows with the
    /// sample, not with the store. Deterministic; all rows when there are
    /// at most `max`.
    pub fn sample_rows(&self, split: Split, max: usize) -> Result<RowMatrix, StoreError> {
        let total = self.row_count(split, None, None)?;
        if max == 0 || total <= max {
            return self.rows(split, None, None);
        }
        // Even spacing: row i * total / max for i < max, strictly ascending
        // because total > max.
        let positions: Vec<usize> = (0..max)
            .map(|i| (i as u128 * total as u128 / max as u128) as usize)
            .collect();
        self.rows_at(split, None, None, &positions)
    }

    /// The rows of one stored chunk value (stores from before row files).
    fn decode_chunk(&self, batch: BatchId, value: &[u8]) -> Result<RowMatrix, StoreError> {
        let width = self.schema.width();
        if !value.len().is_multiple_of(4 * width) {
            return Err(self.corrupt(format!("chunk of batch {batch} is not whole rows")));
        }
        let cells: Vec<u32> = value
            .chunks_exact(4)
            .map(|b| u32::from_le_bytes(b.try_into().expect("4 bytes")))
            .collect();
        Ok(RowMatrix::from_cells(width, cells))
    }

    /// Rows of one split of a batch whose rows are still in `chunks`.
    fn chunk_rows(&self, batch: BatchId, split: Split) -> Result<RowMatrix, StoreError> {
        let mut prefix = batch.key().to_vec();
        prefix.push(split.byte());
        let mut out = RowMatrix::new(self.schema.width());
        for kv in self.chunks.scan_prefix(prefix) {
            let (_, v) = kv.map_err(|e| self.sled_err(e))?;
            out.extend(&self.decode_chunk(batch, &v)?);
        }
        Ok(out)
    }

    /// The path of a row file.
    pub fn row_file_path(&self, file: &FileRef) -> PathBuf {
        self.rows_dir.join(&file.name)
    }

    /// The folder of the row files.
    pub fn rows_dir(&self) -> &Path {
        &self.rows_dir
    }

    /// Appends the rows of `split` of one batch to `out`: all of them, or
    /// those at `wanted` (strictly ascending positions within the batch's
    /// split).
    fn read_batch(
        &self,
        rec: &BatchRecord,
        split: Split,
        wanted: Option<&[usize]>,
        out: &mut RowMatrix,
    ) -> Result<(), StoreError> {
        let n = split_rows(rec, split);
        if n == 0 || wanted.is_some_and(<[usize]>::is_empty) {
            return Ok(());
        }
        match &rec.rows_file {
            Some(file) => {
                let f = RowFile::open(
                    &self.row_file_path(file),
                    &self.schema,
                    rec.id,
                    rec.train_rows as usize,
                    rec.holdout_rows as usize,
                )
                .map_err(|e| self.row_file_err(e))?;
                f.read(&self.schema, &self.vocabs, split, wanted, out)
                    .map_err(|e| self.row_file_err(e))
            }
            None => {
                let rows = self.chunk_rows(rec.id, split)?;
                if rows.n_rows() != n {
                    return Err(self.corrupt(format!(
                        "batch {} holds {} {split:?} rows, its record says {n}",
                        rec.id,
                        rows.n_rows()
                    )));
                }
                match wanted {
                    None => out.extend(&rows),
                    Some(w) => {
                        if let Some(&last) = w.last()
                            && last >= n
                        {
                            return Err(self.corrupt(format!(
                                "position {last} is past the {n} rows of batch {}",
                                rec.id
                            )));
                        }
                        out.extend(&rows.select(w));
                    }
                }
                Ok(())
            }
        }
    }

    /// Rows of one split, for batches in `from..=to` (all when `None`),
    /// leaving out batches set aside.
    pub fn rows(
        &self,
        split: Split,
        from: Option<BatchId>,
        to: Option<BatchId>,
    ) -> Result<RowMatrix, StoreError> {
        let mut out = RowMatrix::new(self.schema.width());
        for rec in self.records_in(from, to, false)? {
            self.read_batch(&rec, split, None, &mut out)?;
        }
        Ok(out)
    }

    /// Rows of one split of one batch, also when it is set aside (for
    /// checking, verifying and migrating the stored rows themselves).
    pub fn batch_rows(&self, split: Split, batch: BatchId) -> Result<RowMatrix, StoreError> {
        let mut out = RowMatrix::new(self.schema.width());
        for rec in self.records_in(Some(batch), Some(batch), true)? {
            self.read_batch(&rec, split, None, &mut out)?;
        }
        Ok(out)
    }

    /// Batch records with ids in `from..=to`, with or without the batches
    /// set aside, in order.
    fn records_in(
        &self,
        from: Option<BatchId>,
        to: Option<BatchId>,
        with_aside: bool,
    ) -> Result<Vec<BatchRecord>, StoreError> {
        let lo = from.unwrap_or(BatchId(0));
        let hi = to.unwrap_or(BatchId(u64::MAX));
        if lo > hi {
            return Ok(Vec::new());
        }
        let mut out = Vec::new();
        for kv in self.batches.range(lo.key()..=hi.key()) {
            let (_, v) = kv.map_err(|e| self.sled_err(e))?;
            let rec: BatchRecord = serde_json::from_slice(&v)
                .map_err(|e| self.corrupt(format!("batch record: {e}")))?;
            if with_aside || !self.aside.contains(&rec.id) {
                out.push(rec);
            }
        }
        Ok(out)
    }

    /// How many rows `rows(split, from, to)` would return, from the batch
    /// records alone.
    pub fn row_count(
        &self,
        split: Split,
        from: Option<BatchId>,
        to: Option<BatchId>,
    ) -> Result<usize, StoreError> {
        Ok(self
            .records_in(from, to, false)?
            .iter()
            .map(|r| split_rows(r, split))
            .sum())
    }

    /// Rows per batch of one split, for batches in `from..=to`, in store
    /// order: the batch of each row that `rows(split, from, to)` returns.
    pub fn split_counts(
        &self,
        split: Split,
        from: Option<BatchId>,
        to: Option<BatchId>,
    ) -> Result<Vec<(BatchId, usize)>, StoreError> {
        Ok(self
            .records_in(from, to, false)?
            .iter()
            .map(|r| (r.id, split_rows(r, split)))
            .collect())
    }

    /// The rows at `positions` (strictly ascending indices into what
    /// `rows(split, from, to)` returns) in that order, decoding only the
    /// row groups that hold them: memory and decoding grow with the
    /// sample, not with the store. Panics when `positions` is not
    /// ascending or reaches past the last row.
    pub fn rows_at(
        &self,
        split: Split,
        from: Option<BatchId>,
        to: Option<BatchId>,
        positions: &[usize],
    ) -> Result<RowMatrix, StoreError> {
        assert!(
            positions.windows(2).all(|w| w[0] < w[1]),
            "positions must be strictly ascending"
        );
        let width = self.schema.width();
        let mut out = RowMatrix::with_capacity(width, positions.len());
        let mut next = positions.iter().copied().peekable();
        let mut base = 0;
        let mut local = Vec::new();
        for rec in self.records_in(from, to, false)? {
            let n = split_rows(&rec, split);
            local.clear();
            while let Some(pos) = next.next_if(|&p| p < base + n) {
                local.push(pos - base);
            }
            if !local.is_empty() {
                self.read_batch(&rec, split, Some(&local), &mut out)?;
            }
            base += n;
        }
        assert!(
            next.next().is_none(),
            "a position reaches past the {base} stored rows"
        );
        Ok(out)
    }

    /// Audit entries in order, as stored.
    pub fn audit_entries(&self) -> Result<Vec<(AuditSeq, Vec<u8>)>, StoreError> {
        self.audit
            .iter()
            .map(|kv| {
                let (k, v) = kv.map_err(|e| self.sled_err(e))?;
                Ok((
                    AuditSeq::from_key(&k).ok_or_else(|| self.corrupt("bad audit key"))?,
                    v.to_vec(),
                ))
            })
            .collect()
    }

    /// Audit entries after `seq`, as stored.
    pub fn audit_after(&self, seq: AuditSeq) -> Result<Vec<(AuditSeq, Vec<u8>)>, StoreError> {
        self.audit
            .range(seq.next().key()..)
            .map(|kv| {
                let (k, v) = kv.map_err(|e| self.sled_err(e))?;
                Ok((
                    AuditSeq::from_key(&k).ok_or_else(|| self.corrupt("bad audit key"))?,
                    v.to_vec(),
                ))
            })
            .collect()
    }

    pub fn last_audit_seq(&self) -> AuditSeq {
        self.last_audit.as_ref().map_or(AuditSeq(0), |(s, _)| *s)
    }

    /// Seals the next audit entry for `event` onto the chain.
    fn seal(&self, event: Event, user: &str, time: chrono::DateTime<chrono::Utc>) -> Entry {
        seal_after(self.last_audit.as_ref(), event, user, time)
    }

    /// Writes a batch's row file into `rows/` and makes it durable (file
    /// and folder synced) before any transaction names it. `texts` gives
    /// the text of every category code the rows use.
    fn write_rows_file(
        &self,
        batch: BatchId,
        schema: &Schema,
        texts: &dyn rowfile::Texts,
        train: &RowMatrix,
        holdout: &RowMatrix,
    ) -> Result<FileRef, StoreError> {
        let io = |path: PathBuf| move |source| StoreError::Io { path, source };
        if !self.rows_dir.is_dir() {
            std::fs::create_dir_all(&self.rows_dir).map_err(io(self.rows_dir.clone()))?;
            if let Some(parent) = self.rows_dir.parent() {
                crate::fsutil::sync_dir(parent).map_err(io(parent.to_path_buf()))?;
            }
        }
        // Encoded straight into a temp file and hashed on the way, then
        // named by its hash: no copy of the whole file in memory.
        let out = crate::fsutil::HashedFile::create(&self.rows_dir, &batch.to_string())
            .map_err(io(self.rows_dir.clone()))?;
        let out = rowfile::encode_into(
            schema,
            texts,
            batch,
            train,
            holdout,
            out,
            rowfile::GROUP_ROWS,
        )
        .map_err(|e| match e {
            RowFileError::Io { source, .. } => StoreError::Io {
                path: self.rows_dir.clone(),
                source,
            },
            other => self.row_file_err(other),
        })?;
        let (path, hash, bytes) = out
            .finish(|hash| rowfile::file_name(batch, hash))
            .map_err(io(self.rows_dir.clone()))?;
        let file = FileRef {
            name: rowfile::file_name(batch, &hash),
            hash: hash.to_hex().to_string(),
            bytes,
        };
        crate::failpoint::hit("store:after-row-file").map_err(io(path))?;
        Ok(file)
    }

    /// Deletes files in `rows/` that no batch record names: row files a
    /// crash left between their write and their transaction, and the old
    /// files of batches rewritten since. Returns how many were deleted.
    pub fn drop_unnamed_row_files(&self) -> Result<usize, StoreError> {
        let entries = match std::fs::read_dir(&self.rows_dir) {
            Ok(e) => e,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(0),
            Err(source) => {
                return Err(StoreError::Io {
                    path: self.rows_dir.clone(),
                    source,
                });
            }
        };
        let named: std::collections::BTreeSet<String> = self
            .batches()?
            .into_iter()
            .filter_map(|r| r.rows_file.map(|f| f.name))
            .collect();
        let mut dropped = 0;
        for entry in entries {
            let entry = entry.map_err(|source| StoreError::Io {
                path: self.rows_dir.clone(),
                source,
            })?;
            let name = entry.file_name().to_string_lossy().into_owned();
            if name.ends_with(".parquet") && !named.contains(&name) {
                std::fs::remove_file(entry.path()).map_err(|source| StoreError::Io {
                    path: entry.path(),
                    source,
                })?;
                dropped += 1;
            }
        }
        if dropped > 0 {
            crate::fsutil::sync_dir(&self.rows_dir).map_err(|source| StoreError::Io {
                path: self.rows_dir.clone(),
                source,
            })?;
        }
        Ok(dropped)
    }

    /// Moves the rows of every batch still kept in `chunks` (a store from
    /// before row files) to a row file: per batch, the file is written and
    /// synced, then one transaction names it in the batch record, removes
    /// the batch's chunks and records a `rows-written` entry. A crash
    /// leaves each batch either in its chunks (the unnamed file is deleted
    /// at the next start, which moves it again) or in its file. Returns
    /// the entries written, in order.
    pub fn move_rows_to_files(
        &mut self,
        user: &str,
        time: chrono::DateTime<chrono::Utc>,
    ) -> Result<Vec<Entry>, StoreError> {
        let mut entries = Vec::new();
        // Every owner's start comes here: a store with no chunks (any
        // store written or moved since row files) has nothing to move,
        // and its batch records need not be read. (A batch with no rows
        // has no chunks either, and reads as empty without a file.)
        if self.chunks.is_empty() {
            return Ok(entries);
        }
        for mut rec in self.batches()? {
            if rec.rows_file.is_some() {
                continue;
            }
            let train = self.chunk_rows(rec.id, Split::Train)?;
            let holdout = self.chunk_rows(rec.id, Split::Holdout)?;
            if train.n_rows() as u64 != rec.train_rows
                || holdout.n_rows() as u64 != rec.holdout_rows
            {
                return Err(self.corrupt(format!(
                    "batch {} holds {} training and {} holdout rows, its record says {} and {}",
                    rec.id,
                    train.n_rows(),
                    holdout.n_rows(),
                    rec.train_rows,
                    rec.holdout_rows
                )));
            }
            let file =
                self.write_rows_file(rec.id, &self.schema, &self.vocabs, &train, &holdout)?;
            let entry = self.seal(
                Event::RowsWritten {
                    batch: rec.id,
                    rows_file: file.clone(),
                    reason: "upgrade: rows moved from the store's chunks to a row file".into(),
                },
                user,
                time,
            );
            rec.rows_file = Some(file);
            let record_json = json(&rec);
            let line = entry.line().into_bytes();
            let mut old_keys = Vec::new();
            for kv in self.chunks.scan_prefix(rec.id.key()) {
                old_keys.push(kv.map_err(|e| self.sled_err(e))?.0.to_vec());
            }
            let store_path = self.path.clone();
            let result: Result<(), TransactionError<StoreError>> =
                (&self.batches, &self.chunks, &self.audit).transaction(
                    |(batches, chunks, audit): &(
                        TransactionalTree,
                        TransactionalTree,
                        TransactionalTree,
                    )| {
                        batches.insert(&rec.id.key()[..], record_json.as_slice())?;
                        for k in &old_keys {
                            chunks.remove(k.as_slice())?;
                        }
                        mid_transaction(&store_path)?;
                        audit.insert(&entry.seq.key()[..], line.as_slice())?;
                        Ok(())
                    },
                );
            self.settle(result)?;
            self.last_audit = Some((entry.seq, entry.hash.clone()));
            entries.push(entry);
        }
        Ok(entries)
    }

    /// Records an event together with changes to `meta` keys (`None`
    /// removes the key), in one
    /// transaction (promotion: the serving pointer and its audit entry).
    pub fn record_with_meta(
        &mut self,
        event: Event,
        user: &str,
        time: chrono::DateTime<chrono::Utc>,
        meta_values: &[MetaChange<'_>],
    ) -> Result<Entry, StoreError> {
        // A move of the serving pointer also records how the model arrived,
        // so nobody needs to read the whole log to learn it.
        let arrival = entry_arrival(&event);
        let entry = self.seal(event, user, time);
        let line = entry.line().into_bytes();
        let result: Result<(), TransactionError<StoreError>> = (&self.meta, &self.audit)
            .transaction(|(meta, audit): &(TransactionalTree, TransactionalTree)| {
                for (k, v) in meta_values {
                    match v {
                        Some(v) => meta.insert(*k, v.as_slice())?,
                        None => meta.remove(*k)?,
                    };
                }
                if let Some((k, v)) = &arrival {
                    meta.insert(k.as_slice(), v.as_slice())?;
                }
                audit.insert(&entry.seq.key()[..], line.as_slice())?;
                Ok(())
            });
        self.settle(result)?;
        self.last_audit = Some((entry.seq, entry.hash.clone()));
        Ok(entry)
    }

    /// Turns a transaction's result into ours and, when it committed, makes
    /// it durable.
    fn settle(&self, result: Result<(), TransactionError<StoreError>>) -> Result<(), StoreError> {
        match result {
            Ok(()) => {
                crate::failpoint::hit("store:before-flush").map_err(|source| StoreError::Io {
                    path: self.path.clone(),
                    source,
                })?;
                self.sync()
            }
            Err(TransactionError::Abort(e)) => Err(e),
            Err(TransactionError::Storage(e)) => Err(self.sled_err(e)),
        }
    }

    /// A `meta` value.
    pub fn meta_value(&self, key: &[u8]) -> Result<Option<Vec<u8>>, StoreError> {
        Ok(self
            .meta
            .get(key)
            .map_err(|e| self.sled_err(e))?
            .map(|v| v.to_vec()))
    }

    /// The serving model according to the store (the authority; the
    /// `serving` file is its mirror for readers).
    pub fn serving(&self) -> Result<Option<ModelId>, StoreError> {
        Ok(self
            .meta_value(META_SERVING)?
            .and_then(|v| ModelId::from_key(&v)))
    }

    /// The id the next trained model gets.
    pub fn next_model_id(&self) -> Result<ModelId, StoreError> {
        Ok(self
            .meta_value(META_NEXT_MODEL)?
            .and_then(|v| ModelId::from_key(&v))
            .unwrap_or(ModelId(1)))
    }

    /// Number of retrain cycles recorded so far.
    pub fn cycles(&self) -> Result<u64, StoreError> {
        Ok(self
            .meta_value(META_CYCLES)?
            .and_then(|v| Some(u64::from_be_bytes(v.try_into().ok()?)))
            .unwrap_or(0))
    }

    /// Every column's past drift distances, by column name. Keys that do
    /// not parse are skipped (the column starts a new history).
    pub fn drift_history(
        &self,
    ) -> Result<BTreeMap<String, crate::drift::PastDistances>, StoreError> {
        let mut out = BTreeMap::new();
        for kv in self.meta.scan_prefix(META_DRIFT_HISTORY) {
            let (k, v) = kv.map_err(|e| self.sled_err(e))?;
            let name = String::from_utf8_lossy(&k[META_DRIFT_HISTORY.len()..]).into_owned();
            if let Ok(p) = serde_json::from_slice(&v) {
                out.insert(name, p);
            }
        }
        Ok(out)
    }

    /// How `model` last came to serve, as recorded beside the entry that
    /// moved the serving pointer: the model serving before it and whether
    /// it came back by a rollback. `None` when no such record exists (the
    /// model never served, or it arrived in a store written before these
    /// records; `lifecycle` then reads the log).
    pub fn arrival(&self, model: ModelId) -> Result<Option<(Option<ModelId>, bool)>, StoreError> {
        let Some(v) = self.meta_value(&arrival_key(model))? else {
            return Ok(None);
        };
        if v.len() != 9 || v[8] > 1 {
            return Err(self.corrupt(format!(
                "arrival record of {model} has a bad length or flag"
            )));
        }
        let previous = ModelId::from_key(&v[..8]).filter(|p| p.0 != 0);
        Ok(Some((previous, v[8] == 1)))
    }

    /// Records an event that touches no data (rejections, duplicates, …).
    pub fn record(
        &mut self,
        event: Event,
        user: &str,
        time: chrono::DateTime<chrono::Utc>,
    ) -> Result<Entry, StoreError> {
        debug_assert!(
            entry_arrival(&event).is_none(),
            "a move of the serving pointer goes through record_with_meta"
        );
        let entry = self.seal(event, user, time);
        self.audit
            .insert(entry.seq.key(), entry.line().into_bytes())
            .map_err(|e| self.sled_err(e))?;
        self.sync()?;
        self.last_audit = Some((entry.seq, entry.hash.clone()));
        Ok(entry)
    }

    /// Commits an accepted batch: rows, batch record, hash index, new
    /// vocabulary, totals, the columns' drift histories and the audit entry
    /// in one transaction, then makes it durable. Returns the batch record
    /// and the sealed audit entry.
    #[allow(clippy::too_many_arguments)]
    pub fn commit_batch(
        &mut self,
        batch: &Batch,
        file: &str,
        hash: &blake3::Hash,
        drift: Option<crate::drift::Measurement>,
        suspect: Option<audit::SuspectEvidence>,
        user: &str,
        time: chrono::DateTime<chrono::Utc>,
    ) -> Result<(BatchRecord, Entry), StoreError> {
        let id = self.next_batch_id();
        // The row file first: durable before the transaction that names it.
        let texts = BatchTexts {
            stored: &self.vocabs,
            new: &batch.new_categories,
        };
        let rows_file =
            self.write_rows_file(id, &self.schema, &texts, &batch.train, &batch.holdout)?;
        let aside = suspect.as_ref().is_some_and(|s| s.suspect);
        let (drift, history) = match drift {
            // A suspect batch's distances would widen every column's idea
            // of an ordinary night: its report is kept, its history is not.
            Some(m) if aside => (Some(m.report), Vec::new()),
            Some(m) => (Some(m.report), m.history),
            None => (None, Vec::new()),
        };
        let history_values: Vec<(Vec<u8>, Vec<u8>)> = history
            .iter()
            .map(|(name, past)| {
                let mut key = META_DRIFT_HISTORY.to_vec();
                key.extend_from_slice(name.as_bytes());
                (key, json(past))
            })
            .collect();
        let train_stats = ColumnStats::of_rows(&self.schema, &batch.train);
        let names = |ci: &usize| self.schema.columns[*ci].name.clone();
        let new_categories: BTreeMap<String, Vec<String>> = batch
            .new_categories
            .iter()
            .map(|(c, v)| {
                (
                    names(c),
                    v[..v.len().min(audit::NEW_VALUES_LISTED)].to_vec(),
                )
            })
            .collect();
        let new_category_counts: BTreeMap<String, u64> = batch
            .new_categories
            .iter()
            .filter(|(_, v)| v.len() > audit::NEW_VALUES_LISTED)
            .map(|(c, v)| (names(c), v.len() as u64))
            .collect();
        let event = Event::BatchAccepted {
            batch: id,
            file: file.to_string(),
            file_hash: hash.to_hex().to_string(),
            rows: batch.rows() as u64,
            train_rows: batch.train.n_rows() as u64,
            holdout_rows: batch.holdout.n_rows() as u64,
            new_categories,
            new_category_counts,
            drift,
            suspect: suspect.clone(),
            rows_file: Some(rows_file.clone()),
        };
        let entry = self.seal(event, user, time);
        let record = BatchRecord {
            id,
            file: file.to_string(),
            hash: hash.to_hex().to_string(),
            accepted_at: entry.time.clone(),
            train_rows: batch.train.n_rows() as u64,
            holdout_rows: batch.holdout.n_rows() as u64,
            audit_seq: entry.seq,
            train_stats: train_stats.clone(),
            rows_file: Some(rows_file),
            set_aside: suspect.filter(|s| s.suspect).map(|s| SetAside {
                automatic: true,
                reason: s.why.join("; "),
                by: user.to_string(),
                at: entry.time.clone(),
                audit_seq: entry.seq,
            }),
        };
        let totals = Totals {
            batches: self.totals.batches + 1,
            train_rows: self.totals.train_rows + record.train_rows,
            holdout_rows: self.totals.holdout_rows + record.holdout_rows,
            train_stats: self.totals.train_stats.merge(&train_stats),
        };
        let mut vocab_values: Vec<([u8; 8], Vec<u8>)> = Vec::new();
        for (ci, values) in &batch.new_categories {
            let start = self.vocabs.get(ci).map_or(0, Vocab::len);
            for (k, v) in values.iter().enumerate() {
                let mut key = [0u8; 8];
                key[..4].copy_from_slice(&u32::try_from(*ci).expect("column index").to_be_bytes());
                key[4..].copy_from_slice(&u32::try_from(start + k).expect("code").to_be_bytes());
                vocab_values.push((key, v.as_bytes().to_vec()));
            }
        }
        let record_json = json(&record);
        let totals_json = json(&totals);
        let line = entry.line().into_bytes();
        let store_path = self.path.clone();
        let result: Result<(), TransactionError<StoreError>> = (
            &self.meta,
            &self.batches,
            &self.hashes,
            &self.vocab,
            &self.audit,
        )
            .transaction(
                |(meta, batches, hashes, vocab, audit): &(
                    TransactionalTree,
                    TransactionalTree,
                    TransactionalTree,
                    TransactionalTree,
                    TransactionalTree,
                )| {
                    if hashes.get(hash.as_bytes())?.is_some() {
                        return Err(ConflictableTransactionError::Abort(StoreError::Corrupt {
                            path: PathBuf::new(),
                            what: "file hash already stored".into(),
                        }));
                    }
                    mid_transaction(&store_path)?;
                    for (k, v) in &vocab_values {
                        vocab.insert(&k[..], v.as_slice())?;
                    }
                    batches.insert(&id.key()[..], record_json.as_slice())?;
                    hashes.insert(&hash.as_bytes()[..], &id.key()[..])?;
                    meta.insert(META_TOTALS, totals_json.as_slice())?;
                    for (k, v) in &history_values {
                        meta.insert(k.as_slice(), v.as_slice())?;
                    }
                    audit.insert(&entry.seq.key()[..], line.as_slice())?;
                    Ok(())
                },
            );
        self.settle(result)?;
        for (ci, values) in &batch.new_categories {
            let v = self.vocabs.entry(*ci).or_default();
            for value in values {
                v.code_or_insert(value);
            }
        }
        self.totals = totals;
        if record.is_set_aside() {
            self.aside.insert(id);
        }
        self.last_audit = Some((entry.seq, entry.hash.clone()));
        Ok((record, entry))
    }

    /// Sets a batch aside (`Some`) or brings it back (`None`): its record
    /// and the audit entry `event` in one transaction. The rows never move:
    /// holdout membership stays a function of the row alone.
    pub fn set_batch_aside(
        &mut self,
        batch: BatchId,
        reason: Option<&str>,
        event: Event,
        user: &str,
        time: chrono::DateTime<chrono::Utc>,
    ) -> Result<(BatchRecord, Entry), StoreError> {
        let mut record = self
            .batch(batch)?
            .ok_or_else(|| self.corrupt(format!("no batch {batch} is stored")))?;
        let entry = self.seal(event, user, time);
        record.set_aside = reason.map(|r| SetAside {
            automatic: false,
            reason: r.to_string(),
            by: user.to_string(),
            at: entry.time.clone(),
            audit_seq: entry.seq,
        });
        let record_json = json(&record);
        let line = entry.line().into_bytes();
        let store_path = self.path.clone();
        let result: Result<(), TransactionError<StoreError>> = (&self.batches, &self.audit)
            .transaction(
                |(batches, audit): &(TransactionalTree, TransactionalTree)| {
                    batches.insert(&batch.key()[..], record_json.as_slice())?;
                    mid_transaction(&store_path)?;
                    audit.insert(&entry.seq.key()[..], line.as_slice())?;
                    Ok(())
                },
            );
        self.settle(result)?;
        if record.is_set_aside() {
            self.aside.insert(batch);
        } else {
            self.aside.remove(&batch);
        }
        self.last_audit = Some((entry.seq, entry.hash.clone()));
        Ok((record, entry))
    }

    /// Rewrites every stored row, vocabulary and column statistic for a new
    /// schema (see `schema::plan_migration`), in one transaction with the
    /// audit entry `event` and one `rows-written` entry per batch; the
    /// serving pointer is cleared (checkpoints belong to the old schema).
    /// Each batch gets a new row file, written and synced before the
    /// transaction; the old files are deleted after it (or, after a crash,
    /// by the next start). Returns the entries in order, `event`'s first.
    pub fn migrate(
        &mut self,
        new_schema: &Schema,
        new_fingerprint: &str,
        plan: &crate::schema::Migration,
        event: Event,
        user: &str,
        time: chrono::DateTime<chrono::Utc>,
    ) -> Result<Vec<Entry>, StoreError> {
        let mut entries = vec![self.seal(event, user, time)];
        let mut old_keys = Vec::new();
        for kv in self.chunks.iter() {
            old_keys.push(kv.map_err(|e| self.sled_err(e))?.0.to_vec());
        }
        // Carried category columns keep their codes: the new column's
        // vocabulary is the old column's.
        let mut new_vocabs = Vocabularies::new();
        for (j, from) in plan.from_old.iter().enumerate() {
            if let Some(v) = from.and_then(|i| self.vocabs.get(&i)) {
                new_vocabs.insert(j, v.clone());
            }
        }
        let mut records = Vec::new();
        for rec in self.batches()? {
            let train = plan.rows(&self.batch_rows(Split::Train, rec.id)?, new_schema);
            let holdout = plan.rows(&self.batch_rows(Split::Holdout, rec.id)?, new_schema);
            let file = self.write_rows_file(rec.id, new_schema, &new_vocabs, &train, &holdout)?;
            let last = entries.last().expect("the migration entry");
            entries.push(seal_after(
                Some(&(last.seq, last.hash.clone())),
                Event::RowsWritten {
                    batch: rec.id,
                    rows_file: file.clone(),
                    reason: "schema migration: rows rewritten for the new columns".into(),
                },
                user,
                time,
            ));
            let mut rec = rec;
            rec.rows_file = Some(file);
            rec.train_stats = plan.stats(&rec.train_stats);
            records.push(rec);
        }
        let mut old_vocab_keys = Vec::new();
        for kv in self.vocab.iter() {
            old_vocab_keys.push(kv.map_err(|e| self.sled_err(e))?.0.to_vec());
        }
        let mut vocab_values: Vec<([u8; 8], Vec<u8>)> = Vec::new();
        for (j, v) in &new_vocabs {
            for (code, value) in v.values().iter().enumerate() {
                let mut key = [0u8; 8];
                key[..4].copy_from_slice(&u32::try_from(*j).expect("column index").to_be_bytes());
                key[4..].copy_from_slice(&u32::try_from(code).expect("code").to_be_bytes());
                vocab_values.push((key, value.as_bytes().to_vec()));
            }
        }
        let totals = Totals {
            train_stats: plan.stats(&self.totals.train_stats),
            ..self.totals.clone()
        };
        let totals_json = json(&totals);
        let schema_json = json(new_schema);
        let lines: Vec<(AuditSeq, Vec<u8>)> = entries
            .iter()
            .map(|e| (e.seq, e.line().into_bytes()))
            .collect();
        let result: Result<(), TransactionError<StoreError>> = (
            &self.meta,
            &self.batches,
            &self.chunks,
            &self.vocab,
            &self.audit,
        )
            .transaction(
                |(meta, batches, chunks, vocab, audit): &(
                    TransactionalTree,
                    TransactionalTree,
                    TransactionalTree,
                    TransactionalTree,
                    TransactionalTree,
                )| {
                    for k in &old_keys {
                        chunks.remove(k.as_slice())?;
                    }
                    for k in &old_vocab_keys {
                        vocab.remove(k.as_slice())?;
                    }
                    for (k, v) in &vocab_values {
                        vocab.insert(&k[..], v.as_slice())?;
                    }
                    for rec in &records {
                        batches.insert(&rec.id.key()[..], json(rec).as_slice())?;
                    }
                    meta.insert(META_TOTALS, totals_json.as_slice())?;
                    meta.insert(META_SCHEMA, schema_json.as_slice())?;
                    meta.insert(META_FINGERPRINT, new_fingerprint.as_bytes())?;
                    meta.remove(META_SERVING)?;
                    meta.remove(&b"pending"[..])?;
                    for (seq, line) in &lines {
                        audit.insert(&seq.key()[..], line.as_slice())?;
                    }
                    Ok(())
                },
            );
        self.settle(result)?;
        self.schema = new_schema.clone();
        let last = entries.last().expect("the migration entry");
        self.last_audit = Some((last.seq, last.hash.clone()));
        self.load_state()?;
        self.drop_unnamed_row_files()?;
        Ok(entries)
    }

    /// Writes a logically identical copy of every tree to a new store at
    /// `dest` (which must not exist) and makes it durable: a consistent
    /// copy while this store stays open, independent of sled's file layout.
    /// Returns the number of key-value pairs copied.
    pub fn copy_to(&self, dest: &Path) -> Result<u64, StoreError> {
        if dest.exists() {
            return Err(StoreError::Corrupt {
                path: dest.to_path_buf(),
                what: "the copy's destination already exists".into(),
            });
        }
        let sl = |e| StoreError::Sled {
            path: dest.to_path_buf(),
            source: e,
        };
        let copy = open_sled(dest).map_err(sl)?;
        let mut pairs = 0;
        for (name, tree) in [
            ("meta", &self.meta),
            ("batches", &self.batches),
            ("hashes", &self.hashes),
            ("chunks", &self.chunks),
            ("vocab", &self.vocab),
            ("audit", &self.audit),
        ] {
            let target = copy.open_tree(name).map_err(sl)?;
            for kv in tree.iter() {
                let (k, v) = kv.map_err(|e| self.sled_err(e))?;
                target.insert(k, v).map_err(sl)?;
                pairs += 1;
            }
        }
        copy.flush().map_err(sl)?;
        drop(copy);
        let io = |path: PathBuf| move |source| StoreError::Io { path, source };
        crate::fsutil::sync_file(&dest.join("db")).map_err(io(dest.join("db")))?;
        crate::fsutil::sync_dir(dest).map_err(io(dest.to_path_buf()))?;
        Ok(pairs)
    }

    /// Makes everything written so far durable: sled's flush writes its log
    /// but does not fsync on Linux, so the data file and folder are synced too.
    pub fn sync(&self) -> Result<(), StoreError> {
        self.db.flush().map_err(|e| self.sled_err(e))?;
        crate::fsutil::sync_file(&self.path.join("db")).map_err(|source| StoreError::Io {
            path: self.path.join("db"),
            source,
        })?;
        crate::fsutil::sync_dir(&self.path).map_err(|source| StoreError::Io {
            path: self.path.clone(),
            source,
        })?;
        crate::failpoint::hit("store:after-flush").map_err(|source| StoreError::Io {
            path: self.path.clone(),
            source,
        })?;
        Ok(())
    }
}

/// The failpoint inside a store transaction, as the transaction's abort.
fn mid_transaction(store_path: &Path) -> Result<(), ConflictableTransactionError<StoreError>> {
    crate::failpoint::hit("store:mid-transaction").map_err(|source| {
        ConflictableTransactionError::Abort(StoreError::Io {
            path: store_path.to_path_buf(),
            source,
        })
    })
}

/// Seals the audit entry that follows `last` (the first when `None`).
fn seal_after(
    last: Option<&(AuditSeq, String)>,
    event: Event,
    user: &str,
    time: chrono::DateTime<chrono::Utc>,
) -> Entry {
    let (seq, prev) = match last {
        Some((s, h)) => (s.next(), h.clone()),
        None => (AuditSeq(1), audit::GENESIS.to_string()),
    };
    Entry::seal(seq, time, user, event, &prev)
}

/// The row files' folder of the store at `store`: `rows/` beside it.
pub fn rows_dir_of(store: &Path) -> PathBuf {
    store
        .parent()
        .map_or_else(|| PathBuf::from("rows"), |p| p.join("rows"))
}

/// Category text while a batch is committed: its new values follow the
/// stored vocabulary's codes.
struct BatchTexts<'a> {
    stored: &'a Vocabularies,
    new: &'a BTreeMap<usize, Vec<String>>,
}

impl rowfile::Texts for BatchTexts<'_> {
    fn text(&self, column: usize, code: u32) -> Option<&str> {
        let have = self.stored.get(&column).map_or(0, Vocab::len);
        match (code as usize).checked_sub(have) {
            None => self.stored.get(&column)?.value(code),
            Some(k) => self.new.get(&column)?.get(k).map(String::as_str),
        }
    }
}

/// The `arrival/` key and value an event writes, if it moves the pointer.
fn entry_arrival(event: &Event) -> Option<(Vec<u8>, Vec<u8>)> {
    event.arrival().map(|(model, previous, by_rollback)| {
        (arrival_key(model), encode_arrival(previous, by_rollback))
    })
}

fn split_rows(record: &BatchRecord, split: Split) -> usize {
    (match split {
        Split::Train => record.train_rows,
        Split::Holdout => record.holdout_rows,
    }) as usize
}

/// Bytes of sled's page cache.
const SLED_CACHE_BYTES: u64 = 64 * 1024 * 1024;

/// sled's background flush interval (its own default). Durability never
/// rests on it: every commit is flushed and fsynced before it is reported.
const SLED_FLUSH_MS: u64 = 500;

/// The one place sled's settings are chosen.
fn open_sled(path: &Path) -> sled::Result<sled::Db> {
    sled::Config::new()
        .path(path)
        .mode(sled::Mode::HighThroughput)
        // sled's default 1 GiB page cache keeps every chunk a cycle touches
        // (a replay sample touches most of them); rows are read once per
        // cycle, so a small cache costs nothing and bounds memory.
        .cache_capacity(SLED_CACHE_BYTES)
        .flush_every_ms(Some(
            crate::failpoint::store_flush_every_ms().unwrap_or(SLED_FLUSH_MS),
        ))
        .open()
}

/// sled 0.34.7 writes a snapshot to `snap.<lsn>.generating`, fsyncs it and
/// renames it; its reader, though, only skips files ending `.in___motion`.
/// A crash between creating and renaming leaves an incomplete `.generating`
/// file that sorts after the last good snapshot, and every later open fails
/// with "Read corrupted data". The file is only a temp: the previous
/// snapshot is removed only after a new one is renamed into place, so
/// deleting it before opening is safe (the kill tests cover this).
fn remove_unfinished_snapshots(path: &Path) -> Result<(), StoreError> {
    let io = |source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    };
    let entries = match std::fs::read_dir(path) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(()),
        Err(e) => return Err(io(e)),
    };
    let mut removed = false;
    for entry in entries {
        let entry = entry.map_err(io)?;
        let name = entry.file_name().to_string_lossy().into_owned();
        if name.starts_with("snap.") && name.ends_with(".generating") {
            std::fs::remove_file(entry.path()).map_err(io)?;
            removed = true;
        }
    }
    if removed {
        crate::fsutil::sync_dir(path).map_err(io)?;
    }
    Ok(())
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    b.get(at..at + 4)
        .and_then(|s| s.try_into().ok())
        .map_or(u32::MAX, u32::from_be_bytes)
}

fn json<T: Serialize>(v: &T) -> Vec<u8> {
    serde_json::to_vec(v).expect("plain data serialises")
}
