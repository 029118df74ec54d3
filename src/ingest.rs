//! One CSV file to one encoded batch, or to a list of reasons it was refused.
//!
//! This module reads the file (once) and does nothing else with the disk:
//! storing, archiving and logging belong to `intake`. A file is refused
//! whole when any row is bad, so a batch is either all stored or not at all.

use std::collections::BTreeMap;
use std::fs;
use std::io::Read;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::config::ColumnKind;
use crate::records::Records;
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

impl Limits {
    /// The limits and split of `config`'s `[data]`.
    pub fn of(config: &crate::config::Config) -> Limits {
        Limits {
            max_file_bytes: config.data.max_file_bytes,
            max_field_bytes: config.data.max_field_bytes,
            holdout_fraction: *config.data.holdout_fraction.get_ref(),
        }
    }
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
    #[error(
        "{path}: is not a regular file (a directory, FIFO, socket or device); tidegate only takes regular files"
    )]
    NotRegular { path: PathBuf },
    #[error(
        "{path}: is {size} bytes, over the limit of {limit} bytes (data.max_file_bytes); split the file or raise the limit"
    )]
    TooLarge {
        path: PathBuf,
        size: u64,
        limit: u64,
    },
    #[error(
        "{path}: changed size while it was read ({before} then {after} bytes); publish files by writing elsewhere and renaming"
    )]
    Changed {
        path: PathBuf,
        before: u64,
        after: u64,
    },
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
    let io = |source| ReadError::Io {
        path: path.to_path_buf(),
        source,
    };
    let meta = fs::symlink_metadata(path).map_err(io)?;
    if meta.file_type().is_symlink() {
        return Err(ReadError::Symlink {
            path: path.to_path_buf(),
        });
    }
    if !meta.file_type().is_file() {
        return Err(ReadError::NotRegular {
            path: path.to_path_buf(),
        });
    }
    if meta.len() > max_bytes {
        return Err(ReadError::TooLarge {
            path: path.to_path_buf(),
            size: meta.len(),
            limit: max_bytes,
        });
    }
    let mut file = open_no_follow(path).map_err(io)?;
    let opened = file.metadata().map_err(io)?;
    if !opened.file_type().is_file() {
        return Err(ReadError::NotRegular {
            path: path.to_path_buf(),
        });
    }
    let mut bytes = Vec::with_capacity(usize::try_from(opened.len()).unwrap_or(0));
    // Read one byte past the limit so a file that grows is still caught.
    file.by_ref()
        .take(max_bytes + 1)
        .read_to_end(&mut bytes)
        .map_err(io)?;
    let read = bytes.len() as u64;
    if read > max_bytes {
        return Err(ReadError::TooLarge {
            path: path.to_path_buf(),
            size: read,
            limit: max_bytes,
        });
    }
    let after = file.metadata().map_err(io)?.len();
    if read != opened.len() || after != read {
        return Err(ReadError::Changed {
            path: path.to_path_buf(),
            before: opened.len(),
            after: after.max(read),
        });
    }
    let hash = blake3::hash(&bytes);
    Ok(RawFile {
        path: path.to_path_buf(),
        bytes,
        hash,
    })
}

/// O_NOFOLLOW | O_NONBLOCK: a link swapped in after the check fails to
/// open, and a FIFO swapped in does not block the open. The values differ
/// between architectures (O_NOFOLLOW is 0o400000 on x86_64 and 0o100000 on
/// aarch64, where 0o400000 is O_LARGEFILE), so they come from libc.
const OPEN_FLAGS: i32 = libc::O_NOFOLLOW | libc::O_NONBLOCK;

fn open_no_follow(path: &Path) -> std::io::Result<fs::File> {
    use std::os::unix::fs::OpenOptionsExt;
    fs::OpenOptions::new()
        .read(true)
        .custom_flags(OPEN_FLAGS)
        .open(path)
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
        if self.line == 0 && self.column.is_none() && self.value.is_none() {
            // A problem of the whole file, not of a line: its reason says so.
            if self.reason.starts_with("the file") {
                return write!(f, "{}", self.reason);
            }
            return write!(f, "the file: {}", self.reason);
        }
        if self.line == 0 {
            write!(f, "the file")?;
        } else {
            write!(f, "line {}", self.line)?;
        }
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
        Refusal {
            problems: vec![Problem {
                line: 0,
                column: None,
                field: None,
                value: None,
                reason: reason.into(),
            }],
            total: 1,
        }
    }

    fn header(reason: impl Into<String>) -> Refusal {
        Refusal {
            problems: vec![Problem {
                line: 1,
                column: None,
                field: None,
                value: None,
                reason: reason.into(),
            }],
            total: 1,
        }
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
/// `stored` is the vocabulary as stored; values not in it get new codes,
/// reported in `Batch::new_categories` for the store to append.
pub fn parse(
    bytes: &[u8],
    schema: &Schema,
    stored: &Vocabularies,
    limits: &Limits,
) -> Result<Batch, Refusal> {
    let parsed = parse_rows(bytes, schema, stored, limits, Purpose::Store)?;
    let width = schema.width();
    let n_holdout = parsed.holdout.iter().filter(|&&h| h).count();
    // Split straight from the parts into buffers of the exact size: one
    // copy of the cells, no growth.
    let mut train = RowMatrix::with_capacity(width, parsed.holdout.len() - n_holdout);
    let mut holdout = RowMatrix::with_capacity(width, n_holdout);
    let mut flags = parsed.holdout.iter();
    for part in &parsed.parts {
        for r in 0..part.n_rows() {
            if *flags.next().expect("a holdout flag per row") {
                holdout.push_row(part.row(r));
            } else {
                train.push_row(part.row(r));
            }
        }
    }
    Ok(Batch {
        train,
        holdout,
        new_categories: parsed.new_categories,
    })
}

/// Rows to be scored by a model, in file order.
#[derive(Debug, Clone)]
pub struct ScoringRows {
    pub rows: RowMatrix,
    /// Whether the file had the target column (so errors can be computed).
    pub has_target: bool,
    /// Category values the vocabulary does not know, per column index; the
    /// model sees them as "none of the known values".
    pub unseen: BTreeMap<usize, Vec<String>>,
}

/// Parses a file to be scored: the same checks as for storing, except that
/// the target column may be absent or empty and nothing is split.
pub fn parse_for_scoring(
    bytes: &[u8],
    schema: &Schema,
    vocabs: &Vocabularies,
    limits: &Limits,
) -> Result<ScoringRows, Refusal> {
    let Parsed {
        parts,
        new_categories,
        has_target,
        ..
    } = parse_rows(bytes, schema, vocabs, limits, Purpose::Score)?;
    Ok(ScoringRows {
        rows: concat(parts),
        has_target,
        unseen: new_categories,
    })
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Purpose {
    Store,
    Score,
}

struct Parsed {
    /// The rows in file order, as the parts parsed them (at least one part:
    /// the cut points always make one).
    parts: Vec<RowMatrix>,
    holdout: Vec<bool>,
    new_categories: BTreeMap<usize, Vec<String>>,
    has_target: bool,
}

/// The parts' rows in one matrix.
fn concat(mut parts: Vec<RowMatrix>) -> RowMatrix {
    if parts.len() == 1 {
        return parts.pop().expect("one part");
    }
    let n = parts.iter().map(RowMatrix::n_rows).sum();
    let mut all = RowMatrix::with_capacity(parts[0].width(), n);
    for part in &parts {
        all.extend(part);
    }
    all
}

fn parse_rows(
    bytes: &[u8],
    schema: &Schema,
    stored: &Vocabularies,
    limits: &Limits,
    purpose: Purpose,
) -> Result<Parsed, Refusal> {
    let parts = if bytes.len() < PARALLEL_MIN_BYTES {
        1
    } else {
        std::thread::available_parallelism().map_or(1, |n| n.get().min(MAX_PARTS))
    };
    parse_rows_in_parts(bytes, schema, stored, limits, purpose, parts)
}

/// Files at least this large are parsed in parts on several threads.
const PARALLEL_MIN_BYTES: usize = 1 << 20;
/// At most this many parts (threads) per file.
const MAX_PARTS: usize = 8;

/// What every part of one file is parsed against.
struct Context<'a> {
    schema: &'a Schema,
    stored: &'a Vocabularies,
    limits: &'a Limits,
    purpose: Purpose,
    /// Schema column of each field of a row.
    order: &'a [usize],
    n_fields: usize,
    odd_quotes: bool,
    has_target: bool,
}

/// The outcome of parsing one stretch of whole lines.
struct Part {
    rows: RowMatrix,
    holdout: Vec<bool>,
    /// Per column: the stored vocabulary plus values first seen in this part
    /// (codes from the stored length on, in order of first appearance).
    vocabs: Vec<Option<schema::Vocab>>,
    new_categories: BTreeMap<usize, Vec<String>>,
    problems: Problems,
    rows_seen: usize,
}

/// Like `parse_rows`, with the number of parts chosen by the caller. The
/// result is the same for every number of parts: rows in file order, codes
/// for new category values in order of first appearance, the same problems
/// with the same line numbers.
fn parse_rows_in_parts(
    bytes: &[u8],
    schema: &Schema,
    stored: &Vocabularies,
    limits: &Limits,
    purpose: Purpose,
    parts: usize,
) -> Result<Parsed, Refusal> {
    if bytes.is_empty() {
        return Err(Refusal::whole_file(
            "the file is empty; expected a header line naming the columns, then rows",
        ));
    }
    if let Some(at) = bytes.iter().position(|&b| b == 0) {
        let line = 1 + bytes[..at].iter().filter(|&&b| b == b'\n').count() as u64;
        return Err(Refusal {
            problems: vec![Problem {
                line,
                column: None,
                field: None,
                value: None,
                reason:
                    "the file contains a NUL byte; it is binary or in UTF-16, save it as UTF-8 text"
                        .into(),
            }],
            total: 1,
        });
    }
    // A UTF-8 byte order mark is allowed and skipped.
    let bytes = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let mut reader = Records::new(bytes);
    let mut header = csv::ByteRecord::new();
    if !reader.read(&mut header) {
        return Err(Refusal::whole_file("the file has no header line"));
    }
    let body_start = reader.consumed();
    let optional_target = (purpose == Purpose::Score).then_some(schema.target);
    let order = match map_header(&header, schema, optional_target) {
        Ok(o) => o,
        Err(reason) => return Err(Refusal::header(reason)),
    };
    let quotes = count_byte(bytes, b'"');
    let context = Context {
        schema,
        stored,
        limits,
        purpose,
        has_target: order.contains(&schema.target),
        order: &order,
        n_fields: header.len(),
        odd_quotes: quotes % 2 == 1,
    };
    // An odd number of quotes leaves no safe place to cut.
    let parts = if context.odd_quotes { 1 } else { parts.max(1) };
    let cuts = cut_points(bytes, body_start, parts, quotes > 0);
    let results: Vec<Part> = if cuts.len() == 2 {
        // One part: the header's reader goes on through the body, so a
        // small input (a prediction request) builds one reader, not two.
        // Its positions count from the start of `bytes`, line 1.
        vec![parse_part(reader, bytes, 1, &context)]
    } else {
        std::thread::scope(|scope| {
            let handles: Vec<_> = cuts
                .windows(2)
                .map(|w| {
                    let (from, to) = (w[0], w[1]);
                    let context = &context;
                    scope.spawn(move || {
                        let part = &bytes[from..to];
                        parse_part(Records::new(part), part, line_of(bytes, from), context)
                    })
                })
                .collect();
            handles
                .into_iter()
                .map(|h| h.join().expect("a parsing thread panicked"))
                .collect()
        })
    };
    merge_parts(results, &context)
}

/// Byte offsets that cut the body into about `parts` stretches of whole
/// records: `[body_start, …, bytes.len()]`. A cut follows a line break
/// outside quotes (an even number of quotes before it).
fn cut_points(bytes: &[u8], body_start: usize, parts: usize, has_quotes: bool) -> Vec<usize> {
    let mut cuts = vec![body_start];
    let body = bytes.len() - body_start;
    let mut quotes_before = 0usize;
    let mut counted_to = body_start;
    for i in 1..parts {
        let target = body_start + body * i / parts;
        let mut at = target.max(*cuts.last().expect("a first cut"));
        loop {
            let Some(nl) = bytes[at..].iter().position(|&b| b == b'\n') else {
                at = bytes.len();
                break;
            };
            at += nl + 1;
            if has_quotes {
                quotes_before += count_byte(&bytes[counted_to..at], b'"');
                counted_to = at;
            }
            if quotes_before.is_multiple_of(2) {
                break;
            }
        }
        if at >= bytes.len() {
            break;
        }
        if at > *cuts.last().expect("a first cut") {
            cuts.push(at);
        }
    }
    cuts.push(bytes.len());
    cuts
}

/// The line number (from 1) of the line that starts at `offset`, counted
/// the way the CSV reader counts: one per line feed.
fn line_of(bytes: &[u8], offset: usize) -> u64 {
    1 + count_byte(&bytes[..offset], b'\n') as u64
}

/// How many times `needle` occurs (counted 64 bytes at a time, which the
/// compiler turns into vector compares).
fn count_byte(bytes: &[u8], needle: u8) -> usize {
    let mut chunks = bytes.chunks_exact(64);
    let mut n = 0usize;
    for chunk in &mut chunks {
        let mut k = 0u8;
        for &b in chunk {
            k += u8::from(b == needle);
        }
        n += usize::from(k);
    }
    n + chunks.remainder().iter().filter(|&&b| b == needle).count()
}

/// The first field of a record that is not valid UTF-8, and the byte in it
/// where the bad sequence starts (both 0-based).
fn first_non_utf8(rec: &csv::ByteRecord) -> Option<(usize, usize)> {
    rec.iter()
        .enumerate()
        .find_map(|(i, f)| std::str::from_utf8(f).err().map(|e| (i, e.valid_up_to())))
}

/// Parses the records `reader` yields from `bytes` (the part, or the whole
/// input with the header already read); `first_line` is the line number
/// of `bytes`' first byte.
fn parse_part(reader: Records<'_>, bytes: &[u8], first_line: u64, cx: &Context<'_>) -> Part {
    let schema = cx.schema;
    let limits = cx.limits;
    let purpose = cx.purpose;
    let n_fields = cx.n_fields;
    let odd_quotes = cx.odd_quotes;
    let width = schema.width();
    let lines = count_byte(bytes, b'\n') + 1;
    let mut part = Part {
        rows: RowMatrix::with_capacity(width, lines),
        holdout: Vec::with_capacity(if purpose == Purpose::Store { lines } else { 0 }),
        vocabs: vec![None; width],
        new_categories: BTreeMap::new(),
        problems: Problems {
            listed: Vec::new(),
            total: 0,
        },
        rows_seen: 0,
    };
    let vocabs = &mut part.vocabs;
    let new_categories = &mut part.new_categories;
    let problems = &mut part.problems;
    let mut cells = vec![0u32; width];
    if !cx.has_target {
        cells[schema.target] = match schema.columns[schema.target].kind {
            ColumnKind::Number => schema::number_cell(None),
            ColumnKind::Category => MISSING_CODE,
        };
    }
    let mut key: Vec<u8> = Vec::with_capacity(width * 8);
    // Line numbers are counted here from each record's first byte: the
    // reader's own count lags by one after a record that ends in CR LF.
    let mut counted_to = 0usize;
    let mut lines_before = 0u64;
    let mut at_line = |pos: &csv::Position| {
        let mut start = usize::try_from(pos.byte())
            .unwrap_or(usize::MAX)
            .min(bytes.len());
        while start < bytes.len() && matches!(bytes[start], b'\n' | b'\r') {
            start += 1;
        }
        if start < counted_to {
            counted_to = 0;
            lines_before = 0;
        }
        lines_before += count_byte(&bytes[counted_to..start], b'\n') as u64;
        counted_to = start;
        first_line + lines_before
    };

    let mut reader = reader;
    let mut rec = csv::ByteRecord::new();
    // Records of bytes in memory cannot fail to be read: a quote never
    // closed runs to the end of the input, and the row-length check
    // below names it.
    while reader.read(&mut rec) {
        let line = rec.position().map_or(0, &mut at_line);
        if rec.len() == 1 && rec.get(0).is_some_and(|f| f.is_empty()) {
            // A blank line carries no row.
            continue;
        }
        part.rows_seen += 1;
        if rec.len() != n_fields {
            problems.push(Problem {
                line,
                column: None,
                field: None,
                value: None,
                reason: if let Some((fi, at)) = first_non_utf8(&rec) {
                    // Another encoding splits rows in ways UTF-8 does not
                    // expect; the count is a symptom, the encoding the cause.
                    format!(
                        "the row is not valid UTF-8 (field {}, byte {}) and has {} fields where the header has {n_fields}; the file seems to be in another encoding (such as Latin-1, Windows-1252 or UTF-16): save it as UTF-8",
                        fi + 1,
                        at + 1,
                        rec.len()
                    )
                } else if odd_quotes && rec.iter().any(|f| f.contains(&b'\n')) {
                    format!("the row has {} fields but the header has {n_fields}: a quote (\") opened in this row is never closed", rec.len())
                } else {
                    format!("the row has {} fields but the header has {n_fields}; every row needs one field per column (quote fields that contain commas)", rec.len())
                },
            });
            continue;
        }
        let mut row_ok = true;
        for (fi, raw) in rec.iter().enumerate() {
            let ci = cx.order[fi];
            let col = &schema.columns[ci];
            let mut bad = |value: &str, reason: String| {
                problems.push(Problem {
                    line,
                    column: Some(col.name.clone()),
                    field: Some(fi + 1),
                    value: Some(shorten(value)),
                    reason,
                });
            };
            if raw.len() > limits.max_field_bytes {
                bad(
                    &String::from_utf8_lossy(&raw[..raw.len().min(80)]),
                    format!(
                        "the field is {} bytes, over the limit of {} (data.max_field_bytes)",
                        raw.len(),
                        limits.max_field_bytes
                    ),
                );
                row_ok = false;
                continue;
            }
            // Most number fields are plain decimals within range: taken
            // without the UTF-8 check, trimming and the general parser.
            if col.kind == ColumnKind::Number
                && let Some(v) = schema::plain_decimal(raw)
                && col.min.is_none_or(|m| v >= m)
                && col.max.is_none_or(|m| v <= m)
            {
                cells[ci] = schema::number_cell(Some(v));
                continue;
            }
            let text = match std::str::from_utf8(raw) {
                Ok(t) => t,
                Err(e) => {
                    bad(
                        &String::from_utf8_lossy(raw),
                        format!(
                            "not valid UTF-8 (at byte {} of the field); save the file as UTF-8",
                            e.valid_up_to() + 1
                        ),
                    );
                    row_ok = false;
                    continue;
                }
            };
            if raw.iter().any(|&b| b == b'\n' || b == b'\r') {
                // Quoted line breaks are valid CSV but not valid values; an
                // odd number of quotes in the file means one never closed.
                let reason = if odd_quotes {
                    "the field runs over a line break because a quote (\") opened in this row is never closed"
                } else {
                    "line breaks inside a value are not accepted; remove them from the quoted field"
                };
                bad(text, reason.into());
                row_ok = false;
                continue;
            }
            // Scoring needs no target value.
            let required = col.required && !(purpose == Purpose::Score && ci == schema.target);
            if !required && text.trim().is_empty() {
                cells[ci] = match col.kind {
                    ColumnKind::Number => schema::number_cell(None),
                    ColumnKind::Category => MISSING_CODE,
                };
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
                        bad(
                            text,
                            "category values may not contain control characters".into(),
                        );
                        row_ok = false;
                    } else {
                        // A refused file is dropped whole, so codes handed
                        // out here for a bad row never reach the store.
                        // A stored value keeps its code in the part's
                        // vocabulary too, so it is looked up without a copy
                        // of the stored one; only a new value needs the copy.
                        let known = cx.stored.get(&ci).and_then(|v| v.code(t));
                        cells[ci] = match known {
                            Some(code) => code,
                            None => {
                                let vocab = vocabs[ci].get_or_insert_with(|| {
                                    cx.stored.get(&ci).cloned().unwrap_or_default()
                                });
                                let (code, added) = vocab.code_or_insert(t);
                                if added {
                                    new_categories.entry(ci).or_default().push(t.to_string());
                                }
                                code
                            }
                        };
                    }
                }
            }
        }
        if !row_ok {
            continue;
        }
        part.rows.push_row(&cells);
        if purpose == Purpose::Score {
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
                        // The part's vocabulary exists once a new value
                        // came; before that the stored one has every code.
                        let v = vocabs[ci]
                            .as_ref()
                            .or_else(|| cx.stored.get(&ci))
                            .and_then(|v| v.value(code))
                            .unwrap_or_default();
                        key.push(1);
                        key.extend_from_slice(&(v.len() as u32).to_le_bytes());
                        key.extend_from_slice(v.as_bytes());
                    }
                },
            }
        }
        part.holdout
            .push(schema::is_holdout(&key, limits.holdout_fraction));
    }
    part
}

/// Joins the parts in file order. New category values get their codes in
/// order of first appearance in the whole file, so a later part's codes
/// are renumbered where an earlier part saw a value first.
fn merge_parts(parts: Vec<Part>, cx: &Context<'_>) -> Result<Parsed, Refusal> {
    let width = cx.schema.width();
    let mut problems = Problems {
        listed: Vec::new(),
        total: 0,
    };
    let mut rows_seen = 0;
    let mut vocabs: Vec<Option<schema::Vocab>> = vec![None; width];
    let mut new_categories: BTreeMap<usize, Vec<String>> = BTreeMap::new();
    let mut rows: Vec<RowMatrix> = Vec::with_capacity(parts.len());
    let mut holdout = Vec::with_capacity(parts.iter().map(|p| p.holdout.len()).sum());
    for mut part in parts {
        problems.total += part.problems.total;
        for p in part.problems.listed {
            if problems.listed.len() < MAX_LISTED_PROBLEMS {
                problems.listed.push(p);
            }
        }
        rows_seen += part.rows_seen;
        for (ci, values) in std::mem::take(&mut part.new_categories) {
            let start = cx.stored.get(&ci).map_or(0, schema::Vocab::len);
            let global =
                vocabs[ci].get_or_insert_with(|| cx.stored.get(&ci).cloned().unwrap_or_default());
            let mut map = Vec::with_capacity(values.len());
            for value in values {
                let (code, added) = global.code_or_insert(&value);
                if added {
                    new_categories.entry(ci).or_default().push(value);
                }
                map.push(code);
            }
            let identity = map
                .iter()
                .enumerate()
                .all(|(k, &c)| c as usize == start + k);
            if !identity {
                part.rows.map_column(ci, |cell| {
                    let local = cell as usize;
                    if cell != MISSING_CODE && local >= start {
                        map[local - start]
                    } else {
                        cell
                    }
                });
            }
        }
        rows.push(part.rows);
        holdout.extend(part.holdout);
    }
    if problems.total > 0 {
        return Err(Refusal {
            problems: problems.listed,
            total: problems.total,
        });
    }
    if rows_seen == 0 {
        return Err(Refusal::whole_file(
            "the file has a header but no rows; nothing to add",
        ));
    }
    Ok(Parsed {
        parts: rows,
        holdout,
        new_categories,
        has_target: cx.has_target,
    })
}

/// Maps each header field to its schema column, or explains what is wrong.
/// `optional` names a column that may be absent (the target, when scoring).
fn map_header(
    header: &csv::ByteRecord,
    schema: &Schema,
    optional: Option<usize>,
) -> Result<Vec<usize>, String> {
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
    let missing: Vec<&str> = schema
        .columns
        .iter()
        .enumerate()
        .filter(|(i, _)| !seen[*i] && Some(*i) != optional)
        .map(|(_, c)| c.name.as_str())
        .collect();
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
    let expected: Vec<&str> = schema
        .columns
        .iter()
        .enumerate()
        .filter(|(i, _)| Some(*i) != optional)
        .map(|(_, c)| c.name.as_str())
        .collect();
    let and_maybe = optional.map_or_else(String::new, |t| {
        format!(", and optionally the target {}", schema.columns[t].name)
    });
    Err(format!(
        "{HEADER_MISMATCH}: {}; expected these columns (any order): {}{and_maybe}",
        parts.join("; "),
        expected.join(", ")
    ))
}

/// How a refusal for a header that names the wrong columns begins (the
/// prediction endpoint, whose "header" is the rows' keys, rewords it).
pub const HEADER_MISMATCH: &str = "the header does not match the config";

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    fn schema() -> (Schema, Limits) {
        let text = std::fs::read_to_string(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/data/small.toml"
        ))
        .unwrap();
        let c = Config::parse(&text, Path::new("small.toml")).unwrap();
        let limits = Limits {
            max_file_bytes: c.data.max_file_bytes,
            max_field_bytes: c.data.max_field_bytes,
            holdout_fraction: 0.25,
        };
        (Schema::from_config(&c), limits)
    }

    fn accept(text: &str) -> Batch {
        let (s, l) = schema();
        parse(text.as_bytes(), &s, &Vocabularies::new(), &l)
            .unwrap_or_else(|r| panic!("refused: {:?}", r.problems))
    }

    fn refuse(text: &[u8]) -> Refusal {
        let (s, l) = schema();
        parse(text, &s, &Vocabularies::new(), &l).expect_err("should be refused")
    }

    /// All rows of a batch (train then holdout) as cells.
    fn all_rows(b: &Batch) -> RowMatrix {
        let mut m = b.train.clone();
        m.extend(&b.holdout);
        m
    }

    #[test]
    fn blake3_identity_of_empty_input() {
        // Published blake3 test vector for the empty input (BLAKE3 spec /
        // reference implementation test_vectors.json, input_len 0).
        assert_eq!(
            blake3::hash(b"").to_hex().as_str(),
            "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262"
        );
    }

    #[test]
    fn rfc4180_quoting() {
        // RFC 4180 §2 rules 5–7: fields may be quoted; quoted fields may hold
        // commas; a quote inside a quoted field is written twice.
        let b = accept(
            "id,city,temp,flag,y\n1,\"Oslo, Norway\",3.5,\"say \"\"hi\"\"\",10\n\"2\",\"Lima\",\"21\",\"\",\"12.5\"\n",
        );
        let (s, _) = schema();
        let rows = all_rows(&b);
        assert_eq!(rows.n_rows(), 2);
        let cities = &b.new_categories[&s.index_of("city").unwrap()];
        assert_eq!(
            cities,
            &vec!["Oslo, Norway".to_string(), "Lima".to_string()]
        );
        assert_eq!(
            b.new_categories[&s.index_of("flag").unwrap()],
            vec!["say \"hi\"".to_string()]
        );
        // RFC 4180 rule 6: a quoted field may contain a line break. It parses
        // as one field (the row is not split), and the value is refused.
        let r = refuse(b"id,city,temp,flag,y\n1,\"Os\r\nlo\",3.5,a,10\n");
        assert_eq!(r.total, 1);
        assert_eq!(r.first().line, 2);
        assert!(
            r.first().reason.contains("line breaks inside a value"),
            "{}",
            r.first()
        );
    }

    #[test]
    fn crlf_bom_and_missing_final_newline_give_identical_rows() {
        let plain = all_rows(&accept(
            "id,city,temp,flag,y\n1,Oslo,3.5,a,10\n2,Lima,21,,12.5\n",
        ));
        let crlf = all_rows(&accept(
            "id,city,temp,flag,y\r\n1,Oslo,3.5,a,10\r\n2,Lima,21,,12.5\r\n",
        ));
        let bom = all_rows(&accept(
            "\u{feff}id,city,temp,flag,y\n1,Oslo,3.5,a,10\n2,Lima,21,,12.5",
        ));
        assert_eq!(plain, crlf);
        assert_eq!(plain, bom);
    }

    #[test]
    fn split_depends_on_content_only() {
        let a = accept(
            "id,city,temp,flag,y\n1,Oslo,3.5,a,10\n2,Lima,21,b,12\n3,Rome,9,a,8\n4,Oslo,7,,11\n5,Lima,1,b,3\n",
        );
        let b = accept(
            "y,id,city,temp,flag\n3,5,Lima,1,b\n11,4,Oslo,7,\n8,3,Rome,9,a\n12,2,Lima,21,b\n10,1,Oslo,3.5,a\n",
        );
        let (s, _) = schema();
        let ids = |m: &RowMatrix| {
            let mut v: Vec<f32> = (0..m.n_rows())
                .map(|r| m.number(r, s.index_of("id").unwrap()).unwrap())
                .collect();
            v.sort_by(f32::total_cmp);
            v
        };
        assert_eq!(ids(&a.holdout), ids(&b.holdout));
        assert_eq!(a.rows(), 5);
    }

    #[test]
    fn codes_continue_the_stored_vocabulary() {
        let (s, l) = schema();
        let city = s.index_of("city").unwrap();
        let mut stored = Vocabularies::new();
        stored.insert(city, schema::Vocab::from_values(vec!["Lima".into()]));
        let b = parse(
            b"id,city,temp,flag,y\n1,Oslo,3.5,a,10\n2,Lima,21,b,12\n",
            &s,
            &stored,
            &l,
        )
        .unwrap();
        assert_eq!(b.new_categories[&city], vec!["Oslo".to_string()]);
        let rows = all_rows(&b);
        let codes: Vec<u32> = (0..2).map(|r| rows.code(r, city).unwrap()).collect();
        let mut sorted = codes.clone();
        sorted.sort();
        assert_eq!(sorted, vec![0, 1], "Lima keeps code 0, Oslo gets 1");
    }

    #[test]
    fn problems_are_capped_but_counted() {
        let mut text = String::from("id,city,temp,flag,y\n");
        for i in 0..150 {
            text.push_str(&format!("{i},Oslo,hot,a,10\n"));
        }
        let r = refuse(text.as_bytes());
        assert_eq!(r.total, 150);
        assert_eq!(r.problems.len(), MAX_LISTED_PROBLEMS);
        assert_eq!(r.problems[99].line, 101);
    }

    #[test]
    fn read_file_refuses_links_fifos_dirs_and_big_files() {
        let d = tempfile::tempdir().unwrap();
        let f = d.path().join("a.csv");
        std::fs::write(&f, b"0123456789").unwrap();
        assert_eq!(read_file(&f, 10).unwrap().hash, blake3::hash(b"0123456789"));
        assert!(matches!(
            read_file(&f, 9),
            Err(ReadError::TooLarge {
                size: 10,
                limit: 9,
                ..
            })
        ));
        let link = d.path().join("l.csv");
        std::os::unix::fs::symlink(&f, &link).unwrap();
        assert!(matches!(
            read_file(&link, 100),
            Err(ReadError::Symlink { .. })
        ));
        assert!(matches!(
            read_file(d.path(), 100),
            Err(ReadError::NotRegular { .. })
        ));
        let fifo = d.path().join("p.csv");
        let status = std::process::Command::new("mkfifo")
            .arg(&fifo)
            .status()
            .unwrap();
        assert!(status.success());
        assert!(matches!(
            read_file(&fifo, 100),
            Err(ReadError::NotRegular { .. })
        ));
        assert!(matches!(
            read_file(&d.path().join("none.csv"), 100),
            Err(ReadError::Io { .. })
        ));
    }

    #[test]
    fn scoring_allows_a_missing_target_and_unseen_categories() {
        let (s, l) = schema();
        let city = s.index_of("city").unwrap();
        let mut known = Vocabularies::new();
        known.insert(city, schema::Vocab::from_values(vec!["Oslo".into()]));
        let scored = parse_for_scoring(
            b"temp,city,id,flag\n3,Oslo,1,a\n4,Quito,2,\n",
            &s,
            &known,
            &l,
        )
        .unwrap();
        assert!(!scored.has_target);
        assert_eq!(scored.rows.n_rows(), 2);
        assert_eq!(scored.rows.number(0, s.target), None);
        assert_eq!(scored.rows.code(0, city), Some(0));
        assert_eq!(scored.unseen[&city], vec!["Quito".to_string()]);
        // File order is kept (no split).
        assert_eq!(scored.rows.number(1, s.index_of("id").unwrap()), Some(2.0));
        // With the target present, an empty target is fine when scoring but
        // not when storing; other columns keep their rules.
        let text = b"id,city,temp,flag,y\n1,Oslo,3,a,\n";
        assert!(parse_for_scoring(text, &s, &known, &l).unwrap().has_target);
        assert!(parse(text, &s, &known, &l).is_err());
        let r = parse_for_scoring(b"id,city,flag,y\n1,Oslo,a,2\n", &s, &known, &l).unwrap_err();
        assert!(
            r.first().reason.contains("missing column(s): temp"),
            "{}",
            r.first()
        );
    }

    mod round_trip {
        use super::*;
        use proptest::prelude::*;

        /// Category text a producer may send: letters, digits, spaces inside,
        /// commas, quotes and non-ASCII, never control characters and never
        /// space at either end (values are trimmed).
        fn category() -> impl Strategy<Value = String> {
            "[A-Za-zÀ-ÿ0-9][A-Za-zÀ-ÿ0-9 ,\"'é-]{0,8}[A-Za-z0-9ø]"
        }

        fn row() -> impl Strategy<Value = (f32, String, f32, Option<String>, f32)> {
            (
                -1.0e6f32..1.0e6,
                category(),
                -50.0f32..=60.0,
                proptest::option::of(category()),
                proptest::num::f32::NORMAL | proptest::num::f32::ZERO,
            )
        }

        proptest! {
            #![proptest_config(ProptestConfig::with_cases(64))]
            /// Rows written by a CSV writer (quoting as needed) come back
            /// with the same numbers bit for bit and the same text.
            #[test]
            fn written_rows_parse_back_exactly(rows in proptest::collection::vec(row(), 1..20)) {
                let (schema, limits) = schema();
                let mut w = csv::Writer::from_writer(Vec::new());
                w.write_record(["id", "city", "temp", "flag", "y"]).unwrap();
                for (i, (_, city, temp, flag, y)) in rows.iter().enumerate() {
                    w.write_record([
                        format!("{i}"),
                        city.clone(),
                        format!("{temp:?}"),
                        flag.clone().unwrap_or_default(),
                        format!("{y:?}"),
                    ])
                    .unwrap();
                }
                let bytes = w.into_inner().unwrap();
                prop_assume!(bytes.len() <= limits.max_file_bytes as usize);
                let batch = parse(&bytes, &schema, &Vocabularies::new(), &limits)
                    .map_err(|r| TestCaseError::fail(format!("{:?}", r.problems)))?;
                let all = all_rows(&batch);
                prop_assert_eq!(all.n_rows(), rows.len());
                // Codes follow first appearance; rebuild the vocabularies.
                let mut vocab: Vec<std::collections::BTreeMap<u32, String>> = vec![Default::default(); 5];
                for (col, values) in &batch.new_categories {
                    for (code, v) in values.iter().enumerate() {
                        vocab[*col].insert(code as u32, v.clone());
                    }
                }
                for r in 0..all.n_rows() {
                    let i = all.number(r, 0).unwrap() as usize;
                    let (_, city, temp, flag, y) = &rows[i];
                    prop_assert_eq!(&vocab[1][&all.code(r, 1).unwrap()], city);
                    prop_assert_eq!(all.number(r, 2).unwrap().to_bits(), temp.to_bits());
                    prop_assert_eq!(all.code(r, 3).map(|c| vocab[3][&c].clone()), flag.clone());
                    prop_assert_eq!(all.number(r, 4).unwrap().to_bits(), y.to_bits());
                }
            }
        }
    }

    mod parts {
        use super::*;
        use proptest::prelude::*;

        /// One line of a file: good rows of several shapes and the usual
        /// mistakes, so cuts fall next to every kind of line.
        fn line() -> impl Strategy<Value = String> {
            let city = prop_oneof![
                Just("Arden".to_string()),
                Just("Bexley".to_string()),
                "[a-e]{1,2}".prop_map(|s| format!("new-{s}")),
                Just("\"Quay, North\"".to_string()),
            ];
            (0u8..12, city, -40i32..50, 0u32..1000).prop_map(|(kind, city, t, id)| match kind {
                0 => String::new(),
                1 => format!("{id},{city},abc,,1.5"),
                2 => format!("{id},{city},{t}"),
                3 => format!("{id},{city},{t},x,2.5\r"),
                4 => format!("{id},{city},99,,1"),
                5 => format!("{id},\"{city}\",{t},\"y\",0.25"),
                _ => format!("{id},{city},{t},,{}.5", id % 7),
            })
        }

        fn stored() -> Vocabularies {
            let mut v = Vocabularies::new();
            v.insert(
                1,
                schema::Vocab::from_values(vec!["Arden".into(), "Bexley".into()]),
            );
            v
        }

        fn run(text: &str, parts: usize) -> Result<Parsed, Refusal> {
            let (s, l) = schema();
            let l = Limits {
                max_file_bytes: u64::MAX,
                ..l
            };
            parse_rows_in_parts(text.as_bytes(), &s, &stored(), &l, Purpose::Store, parts)
        }

        proptest! {
            #![proptest_config(ProptestConfig::with_cases(200))]
            #[test]
            fn any_number_of_parts_gives_what_one_part_gives(
                lines in proptest::collection::vec(line(), 1..60),
                parts in 2usize..7,
            ) {
                let text = format!("id,city,temp,flag,y\n{}\n", lines.join("\n"));
                match (run(&text, 1), run(&text, parts)) {
                    (Ok(a), Ok(b)) => {
                        prop_assert_eq!(&a.holdout, &b.holdout);
                        prop_assert_eq!(&a.new_categories, &b.new_categories);
                        prop_assert_eq!(concat(a.parts), concat(b.parts));
                    }
                    (Err(a), Err(b)) => {
                        prop_assert_eq!(a.total, b.total);
                        prop_assert_eq!(a.problems, b.problems);
                    }
                    (a, b) => prop_assert!(false, "one part: {:?}; {parts} parts: {:?}",
                        a.map(|p| concat(p.parts).n_rows()), b.map(|p| concat(p.parts).n_rows())),
                }
            }
        }

        #[test]
        fn line_numbers_count_crlf_lines_like_an_editor() {
            // Rows 2 and 3 end in CR LF; the bad value is on line 4.
            let text = "id,city,temp,flag,y\r\n1,Arden,5,,1\r\n2,Arden,6,,1\r\n3,Arden,hot,,1\r\n";
            let r = run(text, 1).err().expect("refused");
            assert_eq!(r.problems[0].line, 4);
            let text = "id,city,temp,flag,y\n\n1,Arden,5,,1\r\n\r\n2,Arden,cold,,1\n";
            let r = run(text, 1).err().expect("refused");
            assert_eq!(r.problems[0].line, 5);
        }

        #[test]
        fn cuts_fall_after_line_breaks_outside_quotes() {
            let text = b"h\n1,\"a\nb\"\n2,c\n3,\"d\ne\"\n4,f\n";
            let cuts = cut_points(text, 2, 4, true);
            assert_eq!(*cuts.first().unwrap(), 2);
            assert_eq!(*cuts.last().unwrap(), text.len());
            for &c in &cuts[1..cuts.len() - 1] {
                assert_eq!(text[c - 1], b'\n');
                let quotes = text[..c].iter().filter(|&&b| b == b'"').count();
                assert_eq!(quotes % 2, 0, "cut at {c} is inside quotes");
            }
            assert!(cuts.len() > 2, "the file was cut: {cuts:?}");
        }
    }

    #[test]
    fn the_open_refuses_a_link_and_does_not_block_on_a_fifo() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("real.csv");
        fs::write(&target, "a\n").unwrap();
        let link = dir.path().join("link.csv");
        std::os::unix::fs::symlink(&target, &link).unwrap();
        // Straight at the open, past read_file's own lstat check: this is
        // what stops a link swapped in between the check and the open.
        let e = open_no_follow(&link).unwrap_err();
        assert_eq!(e.raw_os_error(), Some(libc::ELOOP), "{e}");
        assert!(open_no_follow(&target).is_ok());
        let fifo = dir.path().join("pipe");
        let c = std::ffi::CString::new(fifo.as_os_str().as_encoded_bytes()).unwrap();
        // SAFETY: a valid NUL-terminated path.
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        // Without O_NONBLOCK this open would wait for a writer forever.
        assert!(open_no_follow(&fifo).is_ok());
        assert_eq!(OPEN_FLAGS & libc::O_NOFOLLOW, libc::O_NOFOLLOW);
    }
}
