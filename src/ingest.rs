//! One CSV file to one encoded batch, or to a list of reasons it was refused.
//!
//! This module reads the file (once) and does nothing else with the disk:
//! storing, archiving and logging belong to `intake`. A file is refused
//! whole when any row is bad, so a batch is either all stored or not at all.

use std::collections::{BTreeMap, HashMap};
use std::fs;
use std::io::Read;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::config::ColumnKind;
use crate::schema::{self, MISSING_CODE, RowMatrix, Schema, Vocabularies};

/// At most this many problems are listed for one refused file.
pub const MAX_LISTED_PROBLEMS: usize = 100;

/// Limits and split settings that apply to every file.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    pub max_file_bytes: u64,
    pub max_field_bytes: usize,
    pub holdout_fraction: f64,
}

/// The bytes of one file as they were read, and their identity.
#[derive(Debug, Clone)]
pub struct RawFile {
    pub path: PathBuf,
    pub bytes: Vec<u8>,
    pub hash: blake3::Hash,
}

/// Why a file could not even be read as data.
#[derive(Debug, thiserror::Error)]
pub enum ReadError {
    #[error("{path}: is a symbolic link; tidegate only takes regular files (copy the file itself)")]
    Symlink { path: PathBuf },
    #[error("{path}: is not a regular file (a directory, FIFO, socket or device); tidegate only takes regular files")]
    NotRegular { path: PathBuf },
    #[error("{path}: is {size} bytes, over the limit of {limit} bytes (data.max_file_bytes); split the file or raise the limit")]
    TooLarge { path: PathBuf, size: u64, limit: u64 },
    #[error("{path}: changed size while it was read ({before} then {after} bytes); publish files by writing elsewhere and renaming")]
    Changed { path: PathBuf, before: u64, after: u64 },
    #[error("{path}: cannot read: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

impl ReadError {
    /// Whether the file itself is unacceptable (rather than unreadable now).
    pub fn is_refusal(&self) -> bool {
        !matches!(self, ReadError::Io { .. })
    }
}

/// Reads a regular file once, refusing links, special files and files over
/// the limit before any byte is read.
pub fn read_file(path: &Path, max_bytes: u64) -> Result<RawFile, ReadError> {
    let io = |source| ReadError::Io { path: path.to_path_buf(), source };
    let meta = fs::symlink_metadata(path).map_err(io)?;
    if meta.file_type().is_symlink() {
        return Err(ReadError::Symlink { path: path.to_path_buf() });
    }
    if !meta.file_type().is_file() {
        return Err(ReadError::NotRegular { path: path.to_path_buf() });
    }
    if meta.len() > max_bytes {
        return Err(ReadError::TooLarge { path: path.to_path_buf(), size: meta.len(), limit: max_bytes });
    }
    let mut file = open_no_follow(path).map_err(io)?;
    let opened = file.metadata().map_err(io)?;
    if !opened.file_type().is_file() {
        return Err(ReadError::NotRegular { path: path.to_path_buf() });
    }
    let mut bytes = Vec::with_capacity(usize::try_from(opened.len()).unwrap_or(0));
    // Read one byte past the limit so a file that grows is still caught.
    file.by_ref().take(max_bytes + 1).read_to_end(&mut bytes).map_err(io)?;
    let read = bytes.len() as u64;
    if read > max_bytes {
        return Err(ReadError::TooLarge { path: path.to_path_buf(), size: read, limit: max_bytes });
    }
    let after = file.metadata().map_err(io)?.len();
    if read != opened.len() || after != read {
        return Err(ReadError::Changed { path: path.to_path_buf(), before: opened.len(), after: after.max(read) });
    }
    let hash = blake3::hash(&bytes);
    Ok(RawFile { path: path.to_path_buf(), bytes, hash })
}

fn open_no_follow(path: &Path) -> std::io::Result<fs::File> {
    use std::os::unix::fs::OpenOptionsExt;
    // O_NOFOLLOW | O_NONBLOCK: a link swapped in after the check fails to
    // open, and a FIFO swapped in does not block the open.
    const O_NOFOLLOW: i32 = 0o400000;
    const O_NONBLOCK: i32 = 0o4000;
    fs::OpenOptions::new().read(true).custom_flags(O_NOFOLLOW | O_NONBLOCK).open(path)
}

/// One reason a file was refused.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Problem {
    /// 1-based line in the file (the header is line 1); 0 for the whole file.
    pub line: u64,
    /// Column name, when the problem belongs to one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub column: Option<String>,
    /// 1-based field position in the row, when the problem belongs to one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub field: Option<usize>,
    /// The offending text (shortened when long).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub value: Option<String>,
    pub reason: String,
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "line {}", self.line)?;
        if let Some(c) = &self.column {
            write!(f, ", column {c:?}")?;
            if let Some(i) = self.field {
                write!(f, " (field {i})")?;
            }
        }
        if let Some(v) = &self.value {
            write!(f, ", value {v:?}")?;
        }
        write!(f, ": {}", self.reason)
    }
}

/// Everything wrong with a refused file: the first `MAX_LISTED_PROBLEMS`
/// problems and the total count.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Refusal {
    pub problems: Vec<Problem>,
    pub total: usize,
}

impl Refusal {
    fn whole_file(reason: impl Into<String>) -> Refusal {
        Refusal { problems: vec![Problem { line: 0, column: None, field: None, value: None, reason: reason.into() }], total: 1 }
    }

    fn header(reason: impl Into<String>) -> Refusal {
        Refusal { problems: vec![Problem { line: 1, column: None, field: None, value: None, reason: reason.into() }], total: 1 }
    }

    /// The first problem, for one-line messages.
    pub fn first(&self) -> &Problem {
        &self.problems[0]
    }
}

/// A file that passed every check, encoded and split.
#[derive(Debug, Clone)]
pub struct Batch {
    pub train: RowMatrix,
    pub holdout: RowMatrix,
    /// Category values first seen in this file, per column index, in order
    /// of first appearance; their codes follow the existing vocabulary.
    pub new_categories: BTreeMap<usize, Vec<String>>,
}

impl Batch {
    pub fn rows(&self) -> usize {
        self.train.n_rows() + self.holdout.n_rows()
    }
}

struct Problems {
    listed: Vec<Problem>,
    total: usize,
}

impl Problems {
    fn push(&mut self, p: Problem) {
        self.total += 1;
        if self.listed.len() < MAX_LISTED_PROBLEMS {
            self.listed.push(p);
        }
    }
}

fn shorten(s: &str) -> String {
    const MAX: usize = 80;
    if s.chars().count() <= MAX {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(MAX).collect();
        t.push('…');
        t
    }
}

/// Parses and validates the bytes of one file against the schema.
///
/// `vocabs` is the vocabulary as stored; values not in it get new codes,
/// reported in `Batch::new_categories` for the store to append.
pub fn parse(bytes: &[u8], schema: &Schema, stored: &Vocabularies, limits: &Limits) -> Result<Batch, Refusal> {
    if bytes.is_empty() {
        return Err(Refusal::whole_file("the file is empty; expected a header line naming the columns, then rows"));
    }
    if bytes.contains(&0) {
        let line = 1 + bytes[..bytes.iter().position(|&b| b == 0).unwrap_or(0)].iter().filter(|&&b| b == b'\n').count() as u64;
        return Err(Refusal {
            problems: vec![Problem {
                line,
                column: None,
                field: None,
                value: None,
                reason: "the file contains a NUL byte; it is binary or in UTF-16, save it as UTF-8 text".into(),
            }],
            total: 1,
        });
    }
    // A UTF-8 byte order mark is allowed and skipped.
    let bytes = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let mut reader = csv::ReaderBuilder::new().has_headers(false).flexible(true).from_reader(bytes);
    let mut records = reader.byte_records();

    let header = match records.next() {
        None => return Err(Refusal::whole_file("the file has no header line")),
        Some(Err(e)) => return Err(Refusal::header(format!("cannot read the header: {e}"))),
        Some(Ok(h)) => h,
    };
    let order = match map_header(&header, schema) {
        Ok(o) => o,
        Err(reason) => return Err(Refusal::header(reason)),
    };
    let n_fields = header.len();

    let mut vocabs: HashMap<usize, schema::Vocab> = HashMap::new();
    let mut new_categories: BTreeMap<usize, Vec<String>> = BTreeMap::new();
    let mut problems = Problems { listed: Vec::new(), total: 0 };
    let width = schema.width();
    let mut train = RowMatrix::new(width);
    let mut holdout = RowMatrix::new(width);
    let mut cells = vec![0u32; width];
    let mut key: Vec<u8> = Vec::with_capacity(width * 8);
    let mut rows_seen = 0usize;

    for rec in records {
        let rec = match rec {
            Ok(r) => r,
            Err(e) => {
                let line = e.position().map_or(0, |p| p.line());
                problems.push(Problem { line, column: None, field: None, value: None, reason: format!("cannot read the row: {e}") });
                continue;
            }
        };
        let line = rec.position().map_or(0, |p| p.line());
        if rec.len() == 1 && rec.get(0).is_some_and(|f| f.is_empty()) {
            // A blank line carries no row.
            continue;
        }
        rows_seen += 1;
        if rec.len() != n_fields {
            problems.push(Problem {
                line,
                column: None,
                field: None,
                value: None,
                reason: format!("the row has {} fields but the header has {n_fields}; every row needs one field per column (quote fields that contain commas)", rec.len()),
            });
            continue;
        }
        let mut row_ok = true;
        for (fi, raw) in rec.iter().enumerate() {
            let ci = order[fi];
            let col = &schema.columns[ci];
            let mut bad = |value: &str, reason: String| {
                problems.push(Problem { line, column: Some(col.name.clone()), field: Some(fi + 1), value: Some(shorten(value)), reason });
            };
            if raw.len() > limits.max_field_bytes {
                bad(&String::from_utf8_lossy(&raw[..raw.len().min(80)]), format!("the field is {} bytes, over the limit of {} (data.max_field_bytes)", raw.len(), limits.max_field_bytes));
                row_ok = false;
                continue;
            }
            let text = match std::str::from_utf8(raw) {
                Ok(t) => t,
                Err(e) => {
                    bad(&String::from_utf8_lossy(raw), format!("not valid UTF-8 (at byte {} of the field); save the file as UTF-8", e.valid_up_to() + 1));
                    row_ok = false;
                    continue;
                }
            };
            if text.contains(['\n', '\r']) {
                bad(text, "the field contains a line break; most likely a quote (\") opened here is never closed".into());
                row_ok = false;
                continue;
            }
            match col.kind {
                ColumnKind::Number => match schema::parse_number(col, text) {
                    Ok(v) => {
                        let cell = schema::number_cell(v);
                        cells[ci] = cell;
                    }
                    Err(p) => {
                        bad(text, p.to_string());
                        row_ok = false;
                    }
                },
                ColumnKind::Category => {
                    let t = text.trim();
                    if t.is_empty() {
                        if col.required {
                            bad(text, schema::FieldProblem::Missing.to_string());
                            row_ok = false;
                        } else {
                            cells[ci] = MISSING_CODE;
                        }
                    } else if t.chars().any(char::is_control) {
                        bad(text, "category values may not contain control characters".into());
                        row_ok = false;
                    } else {
                        // A refused file is dropped whole, so codes handed
                        // out here for a bad row never reach the store.
                        let vocab = vocabs.entry(ci).or_insert_with(|| stored.get(&ci).cloned().unwrap_or_default());
                        let (code, added) = vocab.code_or_insert(t);
                        if added {
                            new_categories.entry(ci).or_default().push(t.to_string());
                        }
                        cells[ci] = code;
                    }
                }
            }
        }
        if !row_ok {
            continue;
        }
        key.clear();
        for (ci, col) in schema.columns.iter().enumerate() {
            match col.kind {
                ColumnKind::Number => {
                    key.push(0);
                    key.extend_from_slice(&cells[ci].to_le_bytes());
                }
                ColumnKind::Category => match cells[ci] {
                    MISSING_CODE => key.push(2),
                    code => {
                        let v = vocabs.get(&ci).and_then(|v| v.value(code)).unwrap_or_default();
                        key.push(1);
                        key.extend_from_slice(&(v.len() as u32).to_le_bytes());
                        key.extend_from_slice(v.as_bytes());
                    }
                },
            }
        }
        if schema::is_holdout(&key, limits.holdout_fraction) {
            holdout.push_row(&cells);
        } else {
            train.push_row(&cells);
        }
    }
    if problems.total > 0 {
        return Err(Refusal { problems: problems.listed, total: problems.total });
    }
    if rows_seen == 0 {
        return Err(Refusal::whole_file("the file has a header but no rows; nothing to add"));
    }
    Ok(Batch { train, holdout, new_categories })
}

/// Maps each header field to its schema column, or explains what is wrong.
fn map_header(header: &csv::ByteRecord, schema: &Schema) -> Result<Vec<usize>, String> {
    let mut order = Vec::with_capacity(header.len());
    let mut unknown = Vec::new();
    let mut seen = vec![false; schema.width()];
    let mut twice = Vec::new();
    for raw in header {
        let Ok(name) = std::str::from_utf8(raw) else {
            return Err("the header is not valid UTF-8; save the file as UTF-8".into());
        };
        let name = name.trim();
        match schema.index_of(name) {
            Some(i) if seen[i] => twice.push(name.to_string()),
            Some(i) => {
                seen[i] = true;
                order.push(i);
            }
            None => unknown.push(name.to_string()),
        }
    }
    let missing: Vec<&str> = schema.columns.iter().zip(&seen).filter(|(_, s)| !**s).map(|(c, _)| c.name.as_str()).collect();
    if twice.is_empty() && unknown.is_empty() && missing.is_empty() {
        return Ok(order);
    }
    let mut parts = Vec::new();
    if !twice.is_empty() {
        parts.push(format!("column(s) named twice: {}", twice.join(", ")));
    }
    if !missing.is_empty() {
        parts.push(format!("missing column(s): {}", missing.join(", ")));
    }
    if !unknown.is_empty() {
        parts.push(format!("unknown column(s): {}", unknown.join(", ")));
    }
    let expected: Vec<&str> = schema.columns.iter().map(|c| c.name.as_str()).collect();
    Err(format!("the header does not match the config: {}; expected these columns (any order): {}", parts.join("; "), expected.join(", ")))
}
