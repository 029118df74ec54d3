//! The row file of one accepted batch: a Parquet file that holds the
//! batch's rows as plain values, so that any engine that reads Parquet can
//! query the history without tidegate. Encoding to bytes and decoding from
//! a file; where the files live and when they are written is `store`'s.
//!
//! Layout of a file (format 1):
//!
//! | column        | Parquet type                 | meaning                                   |
//! |---------------|------------------------------|-------------------------------------------|
//! | `tg_batch`    | required INT64               | the batch number (12 for `b000012`)       |
//! | `tg_split`    | required BYTE_ARRAY (STRING) | `train` or `holdout`                      |
//! | `tg_row`      | required INT64               | position within the batch's split, from 0, in the order of the input file |
//! | number column | optional FLOAT               | the value as stored (f32); null when missing |
//! | category column | optional BYTE_ARRAY (STRING) | the category text; null when missing    |
//!
//! Data columns follow in the config's order under their config names.
//! The training rows come first, then the holdout rows; each row group
//! holds rows of one split only, at most `GROUP_ROWS` of them, so a reader
//! of one split opens only its row groups. Key-value metadata names the
//! format, the batch and the row counts of each split. No compression: the
//! files are written once and read mostly whole, and a build without
//! codecs stays small.
//!
//! Reading maps category text back to the store's codes through the
//! vocabulary and number values back to their f32 bits, so a round trip is
//! exact (`tests` check it bit for bit).

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use parquet::basic::{LogicalType, Repetition, Type as Physical};
use parquet::column::writer::{ColumnCloseResult, get_column_writer, get_typed_column_writer};
use parquet::data_type::{ByteArray, ByteArrayType, FloatType, Int64Type};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::{WriterProperties, WriterPropertiesPtr};
use parquet::file::reader::{FileReader, SerializedFileReader};
use parquet::file::writer::{SerializedFileWriter, SerializedPageWriter, TrackedWrite};
use parquet::schema::types::{ColumnDescPtr, ColumnPath, Type};

use crate::config::ColumnKind;
use crate::ids::BatchId;
use crate::schema::{MISSING_CODE, RowMatrix, Schema, Vocabularies, number_cell};
use crate::store::Split;

/// Version of the layout above, in every file's metadata.
pub const FORMAT: &str = "1";

/// Most rows in one row group.
pub const GROUP_ROWS: usize = 16_384;

/// Largest row group a reader takes (files written before groups of
/// `GROUP_ROWS` hold up to 65,536 rows a group).
const MAX_GROUP_ROWS: usize = 65_536;

/// The columns every file carries before the data columns. Config columns
/// may not use these names (`config` refuses them).
pub const BATCH_COLUMN: &str = "tg_batch";
pub const SPLIT_COLUMN: &str = "tg_split";
pub const ROW_COLUMN: &str = "tg_row";
pub const RESERVED: [&str; 3] = [BATCH_COLUMN, SPLIT_COLUMN, ROW_COLUMN];

const META_FORMAT: &str = "tidegate.rows.format";
const META_BATCH: &str = "tidegate.rows.batch";
const META_TRAIN: &str = "tidegate.rows.train";
const META_HOLDOUT: &str = "tidegate.rows.holdout";

/// A batch's row file as the store and the audit log record it.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct FileRef {
    /// File name in the state dir's `rows/` folder.
    pub name: String,
    /// blake3 of the file's bytes, hex.
    pub hash: String,
    pub bytes: u64,
}

/// A row file that cannot be written or read as this layout.
#[derive(Debug, thiserror::Error)]
pub enum RowFileError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("row file {path}: {what}")]
    Bad { path: PathBuf, what: String },
}

/// The file name of a batch's row file: the batch, then the first 16 hex
/// digits of the blake3 of its bytes (the whole hash is in the batch record
/// and the audit entry, which `verify` checks against).
pub fn file_name(batch: BatchId, hash: &blake3::Hash) -> String {
    format!("{batch}-{}.parquet", &hash.to_hex()[..16])
}

/// Category text of a code in column `c`, where the codes a batch brings
/// are not yet in the stored vocabulary.
pub trait Texts: Sync {
    fn text(&self, column: usize, code: u32) -> Option<&str>;
}

impl Texts for Vocabularies {
    fn text(&self, column: usize, code: u32) -> Option<&str> {
        self.get(&column)?.value(code)
    }
}

fn file_schema(schema: &Schema) -> Type {
    let required = |name: &str, t: Physical, string: bool| {
        let mut b = Type::primitive_type_builder(name, t).with_repetition(Repetition::REQUIRED);
        if string {
            b = b.with_logical_type(Some(LogicalType::String));
        }
        Arc::new(b.build().expect("a valid primitive type"))
    };
    let mut fields = vec![
        required(BATCH_COLUMN, Physical::INT64, false),
        required(SPLIT_COLUMN, Physical::BYTE_ARRAY, true),
        required(ROW_COLUMN, Physical::INT64, false),
    ];
    for col in &schema.columns {
        let b = match col.kind {
            ColumnKind::Number => Type::primitive_type_builder(&col.name, Physical::FLOAT),
            ColumnKind::Category => Type::primitive_type_builder(&col.name, Physical::BYTE_ARRAY)
                .with_logical_type(Some(LogicalType::String)),
        };
        fields.push(Arc::new(
            b.with_repetition(Repetition::OPTIONAL)
                .build()
                .expect("a valid primitive type"),
        ));
    }
    Type::group_type_builder("tidegate_rows")
        .with_fields(fields)
        .build()
        .expect("a valid group type")
}

fn split_name(split: Split) -> &'static str {
    match split {
        Split::Train => "train",
        Split::Holdout => "holdout",
    }
}

/// The bytes of a batch's row file. `texts` gives the text of every
/// category code the rows use.
pub fn encode(
    schema: &Schema,
    texts: &dyn Texts,
    batch: BatchId,
    train: &RowMatrix,
    holdout: &RowMatrix,
) -> Result<Vec<u8>, RowFileError> {
    encode_into(schema, texts, batch, train, holdout, Vec::new(), GROUP_ROWS)
}

/// `encode`, written to `out` as it is made (a file, so that a large batch
/// needs no buffer of the whole file), in row groups of at most
/// `group_rows` rows ([`GROUP_ROWS`] for every file the store writes);
/// returns `out`.
pub fn encode_into<W: std::io::Write + Send>(
    schema: &Schema,
    texts: &dyn Texts,
    batch: BatchId,
    train: &RowMatrix,
    holdout: &RowMatrix,
    out: W,
    group_rows: usize,
) -> Result<W, RowFileError> {
    // Errors name the batch: the file has no path until it is named.
    let label = PathBuf::from(format!("(rows of {batch})"));
    let bad = |what: String| bad_at(&label, what);
    // A failed write (a full disk) is the machine's error, not a bad file.
    let pq = |e: parquet::errors::ParquetError| match e {
        parquet::errors::ParquetError::External(inner) => {
            match inner.downcast::<std::io::Error>() {
                Ok(io) => RowFileError::Io {
                    path: label.clone(),
                    source: *io,
                },
                Err(other) => bad(other.to_string()),
            }
        }
        other => bad(other.to_string()),
    };
    // Dictionaries pay for text (categories, the split) and constants (the
    // batch); number columns and row numbers are mostly distinct values,
    // where a dictionary costs more bytes and time than plain values.
    let mut props = WriterProperties::builder();
    let plain = std::iter::once(ROW_COLUMN).chain(
        schema
            .columns
            .iter()
            .filter(|c| c.kind == ColumnKind::Number)
            .map(|c| c.name.as_str()),
    );
    for name in plain {
        props = props.set_column_dictionary_enabled(ColumnPath::from(name), false);
    }
    let props = props
        .set_created_by(format!("tidegate {}", env!("CARGO_PKG_VERSION")))
        .set_key_value_metadata(Some(vec![
            KeyValue::new(META_FORMAT.into(), FORMAT.to_string()),
            KeyValue::new(META_BATCH.into(), batch.to_string()),
            KeyValue::new(META_TRAIN.into(), train.n_rows().to_string()),
            KeyValue::new(META_HOLDOUT.into(), holdout.n_rows().to_string()),
        ]))
        .build();
    let props = Arc::new(props);
    let mut writer =
        SerializedFileWriter::new(out, Arc::new(file_schema(schema)), props.clone()).map_err(pq)?;
    let descrs: Vec<ColumnDescPtr> = (0..schema.columns.len())
        .map(|c| writer.schema_descr().column(RESERVED.len() + c))
        .collect();
    let batch_no = i64::try_from(batch.0).map_err(|_| bad("batch number too large".into()))?;
    let mut by_code: Vec<Vec<Option<ByteArray>>> = vec![Vec::new(); schema.columns.len()];
    // The data columns of a row group are encoded on two threads, each
    // into its own buffer, and then appended in column order.
    let half = schema.columns.len().div_ceil(2);
    for (split, rows) in [(Split::Train, train), (Split::Holdout, holdout)] {
        let n = rows.n_rows();
        let mut start = 0;
        while start < n {
            let end = (start + group_rows).min(n);
            let (left, right) = by_code.split_at_mut(half);
            let encoded = std::thread::scope(|scope| {
                let descrs = &descrs;
                let props = &props;
                let other = scope.spawn(move || {
                    (half..schema.columns.len())
                        .zip(right.iter_mut())
                        .map(|(c, known)| {
                            encode_column(
                                schema,
                                texts,
                                rows,
                                c,
                                start..end,
                                &descrs[c],
                                props,
                                known,
                            )
                        })
                        .collect::<Vec<_>>()
                });
                let mut mine: Vec<_> = (0..half)
                    .zip(left.iter_mut())
                    .map(|(c, known)| {
                        encode_column(schema, texts, rows, c, start..end, &descrs[c], props, known)
                    })
                    .collect();
                mine.extend(other.join().expect("a column encoder panicked"));
                mine
            });
            let mut group = writer.next_row_group().map_err(pq)?;
            // The three bookkeeping columns.
            let mut col = group.next_column().map_err(pq)?.expect("tg_batch");
            col.typed::<Int64Type>()
                .write_batch(&vec![batch_no; end - start], None, None)
                .map_err(pq)?;
            col.close().map_err(pq)?;
            let mut col = group.next_column().map_err(pq)?.expect("tg_split");
            let name = ByteArray::from(split_name(split));
            col.typed::<ByteArrayType>()
                .write_batch(&vec![name; end - start], None, None)
                .map_err(pq)?;
            col.close().map_err(pq)?;
            let mut col = group.next_column().map_err(pq)?.expect("tg_row");
            let row_numbers: Vec<i64> = (start as i64..end as i64).collect();
            col.typed::<Int64Type>()
                .write_batch(&row_numbers, None, None)
                .map_err(pq)?;
            col.close().map_err(pq)?;
            for column in encoded {
                match column {
                    Ok((bytes, close)) => group.append_column(&bytes, close).map_err(pq)?,
                    Err(Encoding::Parquet(e)) => return Err(pq(e)),
                    Err(Encoding::UnknownCode(what)) => return Err(bad(what)),
                }
            }
            group.close().map_err(pq)?;
            start = end;
        }
    }
    writer.into_inner().map_err(pq)
}

/// Why one column chunk could not be encoded.
enum Encoding {
    Parquet(parquet::errors::ParquetError),
    UnknownCode(String),
}

impl From<parquet::errors::ParquetError> for Encoding {
    fn from(e: parquet::errors::ParquetError) -> Encoding {
        Encoding::Parquet(e)
    }
}

/// Encodes rows `range` of data column `c` as one column chunk in a buffer
/// of its own, for `append_column`. `known` holds one buffer per category
/// value, shared by every row that holds it (a clone is a reference count).
#[allow(clippy::too_many_arguments)]
fn encode_column(
    schema: &Schema,
    texts: &dyn Texts,
    rows: &RowMatrix,
    c: usize,
    range: std::ops::Range<usize>,
    descr: &ColumnDescPtr,
    props: &WriterPropertiesPtr,
    known: &mut Vec<Option<ByteArray>>,
) -> Result<(bytes::Bytes, ColumnCloseResult), Encoding> {
    let mut sink = TrackedWrite::new(Vec::new());
    let page_writer = SerializedPageWriter::new(&mut sink);
    let writer = get_column_writer(descr.clone(), props.clone(), Box::new(page_writer));
    let mut defs: Vec<i16> = Vec::with_capacity(range.len());
    let column = &schema.columns[c];
    let close = match column.kind {
        ColumnKind::Number => {
            let mut values = Vec::with_capacity(range.len());
            for r in range {
                match rows.number(r, c) {
                    Some(v) => {
                        values.push(v);
                        defs.push(1);
                    }
                    None => defs.push(0),
                }
            }
            let mut w = get_typed_column_writer::<FloatType>(writer);
            w.write_batch(&values, Some(&defs), None)?;
            w.close()?
        }
        ColumnKind::Category => {
            let mut values = Vec::with_capacity(range.len());
            for r in range {
                match rows.code(r, c) {
                    Some(code) => {
                        let slot = code as usize;
                        if known.len() <= slot {
                            known.resize(slot + 1, None);
                        }
                        let value = match &known[slot] {
                            Some(v) => v.clone(),
                            None => {
                                let text = texts.text(c, code).ok_or_else(|| {
                                    Encoding::UnknownCode(format!(
                                        "column {:?} has code {code}, which no vocabulary holds",
                                        column.name
                                    ))
                                })?;
                                let v = ByteArray::from(text);
                                known[slot] = Some(v.clone());
                                v
                            }
                        };
                        values.push(value);
                        defs.push(1);
                    }
                    None => defs.push(0),
                }
            }
            let mut w = get_typed_column_writer::<ByteArrayType>(writer);
            w.write_batch(&values, Some(&defs), None)?;
            w.close()?
        }
    };
    let bytes = bytes::Bytes::from(sink.into_inner()?);
    Ok((bytes, close))
}

/// An open row file, checked against the layout and the schema.
pub struct RowFile {
    path: PathBuf,
    reader: SerializedFileReader<File>,
    /// Rows of each row group, in file order (they add up to the
    /// record's counts: `open` checks it).
    sizes: Vec<usize>,
    /// How many of the groups hold training rows (the first ones).
    train_groups: usize,
}

impl RowFile {
    /// Opens `path` and checks its format, batch, columns and row counts
    /// against what the store expects.
    pub fn open(
        path: &Path,
        schema: &Schema,
        batch: BatchId,
        train_rows: usize,
        holdout_rows: usize,
    ) -> Result<RowFile, RowFileError> {
        let bad = |what: String| bad_at(path, what);
        let reader = open_reader(path)?;
        let meta = reader.metadata().file_metadata();
        let kv = |key: &str| {
            meta.key_value_metadata()
                .and_then(|l| l.iter().find(|k| k.key == key))
                .and_then(|k| k.value.clone())
        };
        if kv(META_FORMAT).as_deref() != Some(FORMAT) {
            return Err(bad(format!(
                "not a format {FORMAT} row file (format {:?})",
                kv(META_FORMAT)
            )));
        }
        if kv(META_BATCH) != Some(batch.to_string()) {
            return Err(bad(format!(
                "holds batch {:?}, expected {batch}",
                kv(META_BATCH)
            )));
        }
        let count = |key| kv(key).and_then(|v| v.parse::<usize>().ok());
        if count(META_TRAIN) != Some(train_rows) || count(META_HOLDOUT) != Some(holdout_rows) {
            return Err(bad(format!(
                "holds {:?} training and {:?} holdout rows, the store says {train_rows} and {holdout_rows}",
                count(META_TRAIN),
                count(META_HOLDOUT)
            )));
        }
        if meta.schema() != &file_schema(schema) {
            return Err(bad(
                "its columns differ from the config's columns (a file written for another schema)"
                    .into(),
            ));
        }
        // Row groups hold one split each, training groups first; their size
        // is the file's own (`GROUP_ROWS` now, 65,536 in earlier files).
        let md = reader.metadata();
        let sizes: Vec<usize> = (0..md.num_row_groups())
            .map(|g| usize::try_from(md.row_group(g).num_rows()).unwrap_or(0))
            .collect();
        if let Some(g) = sizes.iter().position(|&n| n == 0 || n > MAX_GROUP_ROWS) {
            return Err(bad(format!(
                "row group {g} holds {} rows; the layout allows 1 to {MAX_GROUP_ROWS}",
                sizes[g]
            )));
        }
        let mut train_groups = 0;
        let mut sum = 0;
        while sum < train_rows && train_groups < sizes.len() {
            sum += sizes[train_groups];
            train_groups += 1;
        }
        let rest: usize = sizes[train_groups..].iter().sum();
        if sum != train_rows || rest != holdout_rows {
            return Err(bad(format!(
                "its row groups ({} of them) do not split into {train_rows} training and {holdout_rows} holdout rows",
                sizes.len()
            )));
        }
        Ok(RowFile {
            path: path.to_path_buf(),
            reader,
            sizes,
            train_groups,
        })
    }

    fn bad(&self, what: impl Into<String>) -> RowFileError {
        bad_at(&self.path, what.into())
    }

    /// The row groups of `split`, in file order.
    fn groups(&self, split: Split) -> std::ops::Range<usize> {
        match split {
            Split::Train => 0..self.train_groups,
            Split::Holdout => self.train_groups..self.sizes.len(),
        }
    }

    /// Rows in `split`.
    pub fn rows(&self, split: Split) -> usize {
        self.sizes[self.groups(split)].iter().sum()
    }

    /// Appends the rows of `split` whose positions (within the split) are
    /// in `wanted` to `out`: `None` for all, else strictly ascending
    /// positions. Only the row groups that hold them are decoded.
    pub fn read(
        &self,
        schema: &Schema,
        vocabs: &Vocabularies,
        split: Split,
        wanted: Option<&[usize]>,
        out: &mut RowMatrix,
    ) -> Result<(), RowFileError> {
        let n = self.rows(split);
        let mut picks = wanted.map(|w| w.iter().copied().peekable());
        let mut hi = 0;
        for g in self.groups(split) {
            let lo = hi;
            hi += self.sizes[g];
            let local: Option<Vec<usize>> = match picks.as_mut() {
                None => None,
                Some(p) => {
                    let mut v = Vec::new();
                    while let Some(pos) = p.next_if(|&pos| pos < hi) {
                        v.push(pos - lo);
                    }
                    if v.is_empty() {
                        continue;
                    }
                    Some(v)
                }
            };
            let cells = self.decode_group(schema, vocabs, g, hi - lo)?;
            let width = schema.width();
            match local {
                None => {
                    for r in 0..hi - lo {
                        out.push_row(&cells[r * width..(r + 1) * width]);
                    }
                }
                Some(v) => {
                    for r in v {
                        out.push_row(&cells[r * width..(r + 1) * width]);
                    }
                }
            }
        }
        if let Some(mut p) = picks
            && let Some(pos) = p.next()
        {
            return Err(self.bad(format!(
                "position {pos} is past the {n} rows of the {} split",
                split_name(split)
            )));
        }
        Ok(())
    }

    /// The cells of one row group, row-major.
    fn decode_group(
        &self,
        schema: &Schema,
        vocabs: &Vocabularies,
        group: usize,
        rows: usize,
    ) -> Result<Vec<u32>, RowFileError> {
        let pq = |e: parquet::errors::ParquetError| self.bad(format!("row group {group}: {e}"));
        let width = schema.width();
        let mut cells = vec![0u32; rows * width];
        let rg = self.reader.get_row_group(group).map_err(pq)?;
        let mut defs: Vec<i16> = Vec::with_capacity(rows);
        for (c, column) in schema.columns.iter().enumerate() {
            let reader = rg.get_column_reader(RESERVED.len() + c).map_err(pq)?;
            defs.clear();
            let short = |got: usize| {
                self.bad(format!(
                    "row group {group}, column {:?}: {got} rows where {rows} belong",
                    column.name
                ))
            };
            match column.kind {
                ColumnKind::Number => {
                    let (got, values) =
                        read_values::<FloatType>(reader, rows, &mut defs).map_err(pq)?;
                    if got != rows || defs.len() != rows {
                        return Err(short(got));
                    }
                    let mut it = values.into_iter();
                    for (row, &d) in defs.iter().enumerate() {
                        let v = if d == 1 {
                            Some(it.next().ok_or_else(|| short(row))?)
                        } else {
                            None
                        };
                        cells[row * width + c] = number_cell(v);
                    }
                }
                ColumnKind::Category => {
                    let vocab = vocabs.get(&c);
                    let (got, values) =
                        read_values::<ByteArrayType>(reader, rows, &mut defs).map_err(pq)?;
                    if got != rows || defs.len() != rows {
                        return Err(short(got));
                    }
                    let mut it = values.iter();
                    for (row, &d) in defs.iter().enumerate() {
                        cells[row * width + c] = if d == 1 {
                            let bytes = it.next().ok_or_else(|| short(row))?.data();
                            let text = std::str::from_utf8(bytes).map_err(|_| {
                                self.bad(format!(
                                    "row group {group}, column {:?}: a value is not UTF-8",
                                    column.name
                                ))
                            })?;
                            vocab.and_then(|v| v.code(text)).ok_or_else(|| {
                                self.bad(format!(
                                    "row group {group}, column {:?}: value {text:?} is in no stored vocabulary",
                                    column.name
                                ))
                            })?
                        } else {
                            MISSING_CODE
                        };
                    }
                }
            }
        }
        Ok(cells)
    }
}

/// One data column of a row group, as plain values.
#[derive(Debug, Clone, PartialEq)]
pub enum Values {
    Numbers(Vec<Option<f32>>),
    Texts(Vec<Option<String>>),
}

/// Reads any file of this layout without the store or the config: for
/// each row group, its split and every data column by name, in order.
/// Memory is one row group.
pub fn for_each_group(
    path: &Path,
    mut f: impl FnMut(Split, &[(String, Values)]),
) -> Result<(), RowFileError> {
    let bad = |what: String| bad_at(path, what);
    let reader = open_reader(path)?;
    let md = reader.metadata();
    let fields = md.file_metadata().schema().get_fields();
    if fields.len() < RESERVED.len()
        || fields
            .iter()
            .zip(RESERVED)
            .any(|(f, name)| f.name() != name)
    {
        return Err(bad(format!(
            "does not start with the columns {}",
            RESERVED.join(", ")
        )));
    }
    for g in 0..md.num_row_groups() {
        let pq = |e: parquet::errors::ParquetError| bad(format!("row group {g}: {e}"));
        let rows = usize::try_from(md.row_group(g).num_rows()).unwrap_or(0);
        let rg = reader.get_row_group(g).map_err(pq)?;
        let mut names: Vec<ByteArray> = Vec::with_capacity(rows);
        let mut r = parquet::column::reader::get_typed_column_reader::<ByteArrayType>(
            rg.get_column_reader(1).map_err(pq)?,
        );
        r.read_records(rows.max(1), None, None, &mut names)
            .map_err(pq)?;
        let split = match names.first().map(ByteArray::data) {
            Some(b"train") => Split::Train,
            Some(b"holdout") => Split::Holdout,
            other => {
                return Err(bad(format!(
                    "row group {g}: split {:?} is neither train nor holdout",
                    other.map(String::from_utf8_lossy)
                )));
            }
        };
        let mut columns = Vec::with_capacity(fields.len() - RESERVED.len());
        let mut defs: Vec<i16> = Vec::with_capacity(rows);
        for (c, field) in fields.iter().enumerate().skip(RESERVED.len()) {
            let reader = rg.get_column_reader(c).map_err(pq)?;
            defs.clear();
            let values = match field.get_physical_type() {
                Physical::FLOAT => {
                    let mut r =
                        parquet::column::reader::get_typed_column_reader::<FloatType>(reader);
                    let mut v: Vec<f32> = Vec::with_capacity(rows);
                    r.read_records(rows, Some(&mut defs), None, &mut v)
                        .map_err(pq)?;
                    let mut it = v.into_iter();
                    Values::Numbers(
                        defs.iter()
                            .map(|&d| if d == 1 { it.next() } else { None })
                            .collect(),
                    )
                }
                Physical::BYTE_ARRAY => {
                    let (_, v) =
                        read_values::<ByteArrayType>(reader, rows, &mut defs).map_err(pq)?;
                    let mut it = v.iter();
                    Values::Texts(
                        defs.iter()
                            .map(|&d| {
                                (d == 1).then(|| {
                                    it.next().map_or_else(String::new, |b| {
                                        String::from_utf8_lossy(b.data()).into_owned()
                                    })
                                })
                            })
                            .collect(),
                    )
                }
                other => {
                    return Err(bad(format!(
                        "column {:?} has type {other}, not FLOAT or BYTE_ARRAY",
                        field.name()
                    )));
                }
            };
            columns.push((field.name().to_string(), values));
        }
        f(split, &columns);
    }
    Ok(())
}

fn bad_at(path: &Path, what: String) -> RowFileError {
    RowFileError::Bad {
        path: path.to_path_buf(),
        what,
    }
}

/// The Parquet reader of a file, its footer parsed.
fn open_reader(path: &Path) -> Result<SerializedFileReader<File>, RowFileError> {
    let file = File::open(path).map_err(|source| RowFileError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    SerializedFileReader::new(file).map_err(|e| bad_at(path, e.to_string()))
}

/// The values of one optional column chunk of `rows` rows, with its
/// definition levels in `defs` (1: present, 0: null): the records read and
/// the present values in order.
fn read_values<T: parquet::data_type::DataType>(
    reader: parquet::column::reader::ColumnReader,
    rows: usize,
    defs: &mut Vec<i16>,
) -> parquet::errors::Result<(usize, Vec<T::T>)> {
    let mut r = parquet::column::reader::get_typed_column_reader::<T>(reader);
    let mut values = Vec::with_capacity(rows);
    let (got, _, _) = r.read_records(rows, Some(defs), None, &mut values)?;
    Ok((got, values))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Task;
    use crate::rng::Rng;
    use crate::schema::{Column, Vocab};

    fn schema() -> Schema {
        let col = |name: &str, kind| Column {
            name: name.into(),
            kind,
            min: None,
            max: None,
            required: false,
        };
        Schema {
            columns: vec![
                col("temp", ColumnKind::Number),
                col("shop", ColumnKind::Category),
                col("size", ColumnKind::Number),
                col("sold", ColumnKind::Number),
            ],
            target: 3,
            task: Task::Regression,
        }
    }

    fn vocabs() -> Vocabularies {
        let mut v = Vocabularies::new();
        v.insert(
            1,
            Vocab::from_values(
                ["Corrin", "Bell Street", "", "é–ü \"quoted\", comma", "x"]
                    .map(String::from)
                    .to_vec(),
            ),
        );
        v
    }

    /// Rows with every kind of cell: ordinary and awkward numbers (negative
    /// zero, the smallest subnormal, the largest f32), missing numbers,
    /// every category code and missing categories.
    fn rows(n: usize, seed: u64) -> RowMatrix {
        let mut rng = Rng::new(seed);
        let awkward = [-0.0f32, f32::from_bits(1), f32::MAX, -f32::MAX, 1e-30];
        let mut m = RowMatrix::new(4);
        for i in 0..n {
            let number = |rng: &mut Rng| match rng.below(10) {
                0 => None,
                1 => Some(awkward[rng.below(awkward.len())]),
                _ => Some((rng.uniform() * 200.0 - 100.0) as f32),
            };
            let shop = match rng.below(7) {
                0 => MISSING_CODE,
                k => (k as u32 - 1) % 5,
            };
            m.push_row(&[
                number_cell(number(&mut rng)),
                shop,
                number_cell(number(&mut rng)),
                number_cell(Some(i as f32)),
            ]);
        }
        m
    }

    fn write(dir: &Path, batch: BatchId, train: &RowMatrix, holdout: &RowMatrix) -> PathBuf {
        let bytes = encode(&schema(), &vocabs(), batch, train, holdout).unwrap();
        let path = dir.join(file_name(batch, &blake3::hash(&bytes)));
        std::fs::write(&path, bytes).unwrap();
        path
    }

    #[test]
    fn rows_come_back_bit_for_bit_across_row_groups() {
        let dir = tempfile::tempdir().unwrap();
        // More training rows than one row group holds, so the split's
        // groups and the holdout's first group are all exercised.
        let train = rows(GROUP_ROWS + 1234, 1);
        let holdout = rows(777, 2);
        let path = write(dir.path(), BatchId(7), &train, &holdout);
        let f = RowFile::open(&path, &schema(), BatchId(7), train.n_rows(), 777).unwrap();
        for (split, want) in [(Split::Train, &train), (Split::Holdout, &holdout)] {
            let mut got = RowMatrix::new(4);
            f.read(&schema(), &vocabs(), split, None, &mut got).unwrap();
            assert_eq!(got.cells(), want.cells(), "{split:?}");
        }
    }

    #[test]
    fn files_with_the_earlier_larger_row_groups_still_read() {
        // Files written before groups of GROUP_ROWS held 65,536 rows a group.
        let dir = tempfile::tempdir().unwrap();
        let train = rows(MAX_GROUP_ROWS + 300, 5);
        let holdout = rows(GROUP_ROWS + 10, 6);
        let bytes = encode_into(
            &schema(),
            &vocabs(),
            BatchId(3),
            &train,
            &holdout,
            Vec::new(),
            MAX_GROUP_ROWS,
        )
        .unwrap();
        let path = dir
            .path()
            .join(file_name(BatchId(3), &blake3::hash(&bytes)));
        std::fs::write(&path, bytes).unwrap();
        let (nt, nh) = (train.n_rows(), holdout.n_rows());
        let f = RowFile::open(&path, &schema(), BatchId(3), nt, nh).unwrap();
        assert_eq!((f.sizes.len(), f.train_groups), (3, 2));
        for (split, want) in [(Split::Train, &train), (Split::Holdout, &holdout)] {
            let mut got = RowMatrix::new(4);
            f.read(&schema(), &vocabs(), split, None, &mut got).unwrap();
            assert_eq!(got.cells(), want.cells(), "{split:?}");
        }
        let picks = vec![0, GROUP_ROWS, MAX_GROUP_ROWS - 1, MAX_GROUP_ROWS, nt - 1];
        let mut got = RowMatrix::new(4);
        f.read(&schema(), &vocabs(), Split::Train, Some(&picks), &mut got)
            .unwrap();
        assert_eq!(got.cells(), train.select(&picks).cells());
        // The same rows in today's groups: more of them, same rows.
        let now = write(dir.path(), BatchId(4), &train, &holdout);
        let g = RowFile::open(&now, &schema(), BatchId(4), nt, nh).unwrap();
        assert_eq!(
            g.sizes.len(),
            nt.div_ceil(GROUP_ROWS) + nh.div_ceil(GROUP_ROWS)
        );
        // A record with other counts is refused.
        let err = RowFile::open(&path, &schema(), BatchId(3), nt - 1, nh + 1);
        assert!(err.is_err());
    }

    #[test]
    fn chosen_positions_come_back_in_order() {
        let dir = tempfile::tempdir().unwrap();
        let train = rows(GROUP_ROWS + 500, 3);
        let holdout = rows(40, 4);
        let path = write(dir.path(), BatchId(2), &train, &holdout);
        let f = RowFile::open(&path, &schema(), BatchId(2), train.n_rows(), 40).unwrap();
        let mut rng = Rng::new(9);
        let picks: Vec<usize> = (0..train.n_rows()).filter(|_| rng.below(97) == 0).collect();
        let picks = [
            vec![0],
            picks,
            vec![GROUP_ROWS - 1, GROUP_ROWS, train.n_rows() - 1],
        ]
        .concat();
        let mut picks = picks;
        picks.sort_unstable();
        picks.dedup();
        let mut got = RowMatrix::new(4);
        f.read(&schema(), &vocabs(), Split::Train, Some(&picks), &mut got)
            .unwrap();
        assert_eq!(got.cells(), train.select(&picks).cells());
        // A position past the split is an error naming the file, not a panic.
        let err = f
            .read(&schema(), &vocabs(), Split::Holdout, Some(&[40]), &mut got)
            .unwrap_err();
        assert!(
            err.to_string().contains(&path.display().to_string()),
            "{err}"
        );
    }

    #[test]
    fn a_file_that_does_not_match_the_record_is_refused_with_its_path() {
        let dir = tempfile::tempdir().unwrap();
        let path = write(dir.path(), BatchId(3), &rows(10, 5), &rows(4, 6));
        let mut other = schema();
        other.columns[2].name = "width".into();
        let cases: [(Schema, BatchId, usize, usize, &str); 4] = [
            (schema(), BatchId(4), 10, 4, "expected b000004"),
            (schema(), BatchId(3), 11, 4, "the store says 11 and 4"),
            (schema(), BatchId(3), 10, 3, "the store says 10 and 3"),
            (other, BatchId(3), 10, 4, "columns differ"),
        ];
        for (s, batch, train, holdout, says) in cases {
            let err = RowFile::open(&path, &s, batch, train, holdout)
                .err()
                .expect("refused");
            let text = err.to_string();
            assert!(
                text.contains(says) && text.contains(&path.display().to_string()),
                "{text}"
            );
        }
        std::fs::write(&path, b"PAR1 but not really").unwrap();
        let err = RowFile::open(&path, &schema(), BatchId(3), 10, 4)
            .err()
            .expect("refused");
        assert!(matches!(err, RowFileError::Bad { .. }), "{err}");
    }

    #[test]
    fn a_category_value_outside_the_vocabulary_is_damage() {
        let dir = tempfile::tempdir().unwrap();
        let train = rows(50, 8);
        let path = write(dir.path(), BatchId(1), &train, &RowMatrix::new(4));
        let mut short = vocabs();
        short.insert(1, Vocab::from_values(vec!["Corrin".into()]));
        let f = RowFile::open(&path, &schema(), BatchId(1), 50, 0).unwrap();
        let err = f
            .read(
                &schema(),
                &short,
                Split::Train,
                None,
                &mut RowMatrix::new(4),
            )
            .unwrap_err();
        assert!(err.to_string().contains("in no stored vocabulary"), "{err}");
    }

    #[test]
    fn a_code_without_text_is_refused_at_writing() {
        let mut m = RowMatrix::new(4);
        m.push_row(&[
            number_cell(Some(1.0)),
            9,
            number_cell(None),
            number_cell(Some(2.0)),
        ]);
        let err = encode(&schema(), &vocabs(), BatchId(1), &m, &RowMatrix::new(4)).unwrap_err();
        assert!(err.to_string().contains("code 9"), "{err}");
    }

    #[test]
    fn the_same_rows_give_the_same_bytes() {
        // The file name carries the hash of the bytes, so a rewrite of the
        // same rows (a migration that changes nothing for a batch) must
        // give the same name.
        let (a, b) = (rows(300, 11), rows(70, 12));
        let one = encode(&schema(), &vocabs(), BatchId(5), &a, &b).unwrap();
        let two = encode(&schema(), &vocabs(), BatchId(5), &a, &b).unwrap();
        assert_eq!(blake3::hash(&one), blake3::hash(&two));
        let three = encode(&schema(), &vocabs(), BatchId(6), &a, &b).unwrap();
        assert_ne!(blake3::hash(&one), blake3::hash(&three));
    }

    #[test]
    fn file_names_carry_batch_and_hash() {
        let h = blake3::hash(b"x");
        let name = file_name(BatchId(12), &h);
        assert_eq!(name, format!("b000012-{}.parquet", &h.to_hex()[..16]));
    }
}
