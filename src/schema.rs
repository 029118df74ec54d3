//! Column kinds, the encoding of one CSV row into fixed-width cells,
//! category vocabularies, streaming column statistics, and the feature
//! encoding a network sees. Pure: no I/O.
//!
//! A stored row is one 32-bit cell per schema column, in config order:
//! number columns hold the bits of an `f32` (NaN means missing), category
//! columns hold a code into that column's vocabulary (`MISSING_CODE` means
//! missing). Codes are given in order of first appearance and never change,
//! so a vocabulary only grows.

use std::collections::{BTreeMap, HashMap};

use serde::{Deserialize, Serialize};

use crate::config::{ColumnKind, Config, Task};

/// Cell value of a missing category.
pub const MISSING_CODE: u32 = u32::MAX;

/// One column as the rest of the program sees it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Column {
    pub name: String,
    pub kind: ColumnKind,
    pub min: Option<f32>,
    pub max: Option<f32>,
    pub required: bool,
}

/// The columns, which one is the target, and the task.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Schema {
    pub columns: Vec<Column>,
    pub target: usize,
    pub task: Task,
}

impl Schema {
    /// Builds the schema from a validated config.
    pub fn from_config(config: &Config) -> Schema {
        let columns: Vec<Column> = config
            .data
            .columns
            .iter()
            .map(|c| Column {
                name: c.name.get_ref().clone(),
                kind: c.kind,
                // Bounds are compared in f32, the precision values are stored in.
                min: c.min.as_ref().map(|v| *v.get_ref() as f32),
                max: c.max.as_ref().map(|v| *v.get_ref() as f32),
                required: c.required,
            })
            .collect();
        let target = columns
            .iter()
            .position(|c| &c.name == config.data.target.get_ref())
            .expect("validated config names its target among the columns");
        Schema {
            columns,
            target,
            task: config.data.task,
        }
    }

    pub fn width(&self) -> usize {
        self.columns.len()
    }

    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }

    /// Indexes of the input (non-target) columns, in schema order.
    pub fn inputs(&self) -> impl Iterator<Item = usize> + '_ {
        (0..self.columns.len()).filter(move |&i| i != self.target)
    }
}

/// Why one field was refused.
#[derive(Debug, Clone, PartialEq)]
pub enum FieldProblem {
    Missing,
    NotANumber,
    NotFinite,
    BelowMin(f32),
    AboveMax(f32),
}

impl std::fmt::Display for FieldProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FieldProblem::Missing => write!(
                f,
                "empty field in a required column; fill it in or mark the column required = false"
            ),
            FieldProblem::NotANumber => {
                write!(f, "not a number; write a decimal number such as 12.5")
            }
            FieldProblem::NotFinite => write!(
                f,
                "NaN and infinity are not accepted; leave the field empty for missing (if the column allows it)"
            ),
            FieldProblem::BelowMin(m) => write!(f, "below the column's min of {m}"),
            FieldProblem::AboveMax(m) => write!(f, "above the column's max of {m}"),
        }
    }
}

/// Parses a number field into the stored `f32`, checking bounds.
/// `Ok(None)` is an accepted empty field in an optional column.
pub fn parse_number(col: &Column, text: &str) -> Result<Option<f32>, FieldProblem> {
    let t = text.trim();
    if t.is_empty() {
        return if col.required {
            Err(FieldProblem::Missing)
        } else {
            Ok(None)
        };
    }
    let v: f32 = t.parse().map_err(|_| FieldProblem::NotANumber)?;
    if !v.is_finite() {
        // "1e999" parses to infinity: refuse it like an explicit "inf".
        return Err(FieldProblem::NotFinite);
    }
    if let Some(m) = col.min
        && v < m
    {
        return Err(FieldProblem::BelowMin(m));
    }
    if let Some(m) = col.max
        && v > m
    {
        return Err(FieldProblem::AboveMax(m));
    }
    Ok(Some(v))
}

/// The value of a plain decimal field (`[+-]digits[.digits]`, at most
/// 2^24 as an integer when the point is removed, at most ten digits after
/// it), or `None` for anything else, which then takes the general path.
/// Both the integer and the power of ten are exact in f32, so one IEEE
/// division rounds correctly: the result equals `str::parse::<f32>`.
pub fn plain_decimal(field: &[u8]) -> Option<f32> {
    const POW10: [f32; 11] = [1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10];
    let (negative, digits) = match field.first()? {
        b'-' => (true, &field[1..]),
        b'+' => (false, &field[1..]),
        _ => (false, field),
    };
    if digits.is_empty() || digits.len() > 19 {
        return None;
    }
    let mut mantissa: u64 = 0;
    let mut seen_digit = false;
    let mut after_point: Option<usize> = None;
    for &c in digits {
        match c {
            b'0'..=b'9' => {
                mantissa = mantissa * 10 + u64::from(c - b'0');
                seen_digit = true;
                if let Some(n) = after_point.as_mut() {
                    *n += 1;
                }
            }
            b'.' if after_point.is_none() => after_point = Some(0),
            _ => return None,
        }
    }
    let scale = after_point.unwrap_or(0);
    if !seen_digit || mantissa > 1 << 24 || scale >= POW10.len() {
        return None;
    }
    let v = mantissa as f32 / POW10[scale];
    Some(if negative { -v } else { v })
}

/// Category values seen so far, per category column, in order of first
/// appearance. Codes are indexes into `values`.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Vocab {
    values: Vec<String>,
    /// Value to code. Values come from input files, so the hasher is seeded
    /// per process (no crafted collisions) and fast on short strings.
    #[serde(skip)]
    index: HashMap<String, u32, foldhash::fast::RandomState>,
}

impl Vocab {
    pub fn from_values(values: Vec<String>) -> Vocab {
        let index = values
            .iter()
            .enumerate()
            .map(|(i, v)| (v.clone(), u32::try_from(i).expect("vocabulary below 2^32")))
            .collect();
        Vocab { values, index }
    }

    pub fn code(&self, value: &str) -> Option<u32> {
        self.index.get(value).copied()
    }

    /// The code of `value`, adding it when new; `true` when it was added.
    pub fn code_or_insert(&mut self, value: &str) -> (u32, bool) {
        if let Some(c) = self.code(value) {
            return (c, false);
        }
        let c = u32::try_from(self.values.len()).expect("vocabulary below 2^32");
        assert!(c < MISSING_CODE, "vocabulary full");
        self.values.push(value.to_string());
        self.index.insert(value.to_string(), c);
        (c, true)
    }

    pub fn value(&self, code: u32) -> Option<&str> {
        self.values.get(code as usize).map(String::as_str)
    }

    pub fn values(&self) -> &[String] {
        &self.values
    }

    pub fn len(&self) -> usize {
        self.values.len()
    }

    pub fn is_empty(&self) -> bool {
        self.values.is_empty()
    }
}

/// Vocabularies of every category column, keyed by column index.
pub type Vocabularies = BTreeMap<usize, Vocab>;

/// Streaming mean and variance (Welford), mergeable across batches (Chan et al.).
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct RunningStats {
    pub count: u64,
    pub mean: f64,
    /// Sum of squared deviations from the mean.
    pub m2: f64,
    pub min: f64,
    pub max: f64,
}

impl RunningStats {
    pub fn push(&mut self, x: f64) {
        if self.count == 0 {
            self.min = x;
            self.max = x;
        } else {
            self.min = self.min.min(x);
            self.max = self.max.max(x);
        }
        self.count += 1;
        let delta = x - self.mean;
        self.mean += delta / self.count as f64;
        self.m2 += delta * (x - self.mean);
    }

    /// Combines two summaries as if all values had been pushed into one.
    pub fn merge(&self, other: &RunningStats) -> RunningStats {
        if self.count == 0 {
            return *other;
        }
        if other.count == 0 {
            return *self;
        }
        let n = self.count + other.count;
        let (na, nb, nn) = (self.count as f64, other.count as f64, n as f64);
        let delta = other.mean - self.mean;
        RunningStats {
            count: n,
            mean: self.mean + delta * nb / nn,
            m2: self.m2 + other.m2 + delta * delta * na * nb / nn,
            min: self.min.min(other.min),
            max: self.max.max(other.max),
        }
    }

    pub fn population_variance(&self) -> f64 {
        if self.count == 0 {
            0.0
        } else {
            self.m2 / self.count as f64
        }
    }

    pub fn sample_variance(&self) -> f64 {
        if self.count < 2 {
            0.0
        } else {
            self.m2 / (self.count - 1) as f64
        }
    }

    pub fn std_dev(&self) -> f64 {
        self.sample_variance().sqrt()
    }
}

/// Statistics of every number column (by column index) and counts of every
/// category code (by column index, then code).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct ColumnStats {
    pub numbers: BTreeMap<usize, RunningStats>,
    pub missing: BTreeMap<usize, u64>,
}

impl ColumnStats {
    pub fn merge(&self, other: &ColumnStats) -> ColumnStats {
        let mut out = self.clone();
        for (k, v) in &other.numbers {
            let e = out.numbers.entry(*k).or_default();
            *e = e.merge(v);
        }
        for (k, v) in &other.missing {
            *out.missing.entry(*k).or_default() += v;
        }
        out
    }

    /// Summarises the number columns of `rows`.
    pub fn of_rows(schema: &Schema, rows: &RowMatrix) -> ColumnStats {
        let mut s = ColumnStats::default();
        for (ci, col) in schema.columns.iter().enumerate() {
            if col.kind != ColumnKind::Number {
                continue;
            }
            let mut st = RunningStats::default();
            let mut miss = 0;
            for r in 0..rows.n_rows() {
                match rows.number(r, ci) {
                    Some(v) => st.push(f64::from(v)),
                    None => miss += 1,
                }
            }
            s.numbers.insert(ci, st);
            if miss > 0 {
                s.missing.insert(ci, miss);
            }
        }
        s
    }
}

/// Rows as a dense row-major matrix of cells, one per schema column.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RowMatrix {
    width: usize,
    cells: Vec<u32>,
}

impl RowMatrix {
    pub fn new(width: usize) -> RowMatrix {
        RowMatrix {
            width,
            cells: Vec::new(),
        }
    }

    pub fn with_capacity(width: usize, rows: usize) -> RowMatrix {
        RowMatrix {
            width,
            cells: Vec::with_capacity(width * rows),
        }
    }

    /// Wraps cells; `cells.len()` must be a multiple of `width`.
    pub fn from_cells(width: usize, cells: Vec<u32>) -> RowMatrix {
        assert!(
            width > 0 && cells.len().is_multiple_of(width),
            "cells do not fill whole rows"
        );
        RowMatrix { width, cells }
    }

    pub fn width(&self) -> usize {
        self.width
    }

    pub fn n_rows(&self) -> usize {
        self.cells.len().checked_div(self.width).unwrap_or(0)
    }

    pub fn cells(&self) -> &[u32] {
        &self.cells
    }

    pub fn row(&self, r: usize) -> &[u32] {
        &self.cells[r * self.width..(r + 1) * self.width]
    }

    /// Rewrites every cell of one column.
    pub fn map_column(&mut self, column: usize, mut f: impl FnMut(u32) -> u32) {
        let width = self.width;
        for cell in self.cells.iter_mut().skip(column).step_by(width.max(1)) {
            *cell = f(*cell);
        }
    }

    pub fn push_row(&mut self, row: &[u32]) {
        assert_eq!(row.len(), self.width);
        self.cells.extend_from_slice(row);
    }

    pub fn extend(&mut self, other: &RowMatrix) {
        assert_eq!(other.width, self.width);
        self.cells.extend_from_slice(&other.cells);
    }

    /// A number cell; `None` when missing.
    pub fn number(&self, r: usize, c: usize) -> Option<f32> {
        let v = f32::from_bits(self.cells[r * self.width + c]);
        (!v.is_nan()).then_some(v)
    }

    /// A category cell; `None` when missing.
    pub fn code(&self, r: usize, c: usize) -> Option<u32> {
        let v = self.cells[r * self.width + c];
        (v != MISSING_CODE).then_some(v)
    }

    /// Rows picked by index, in the given order.
    pub fn select(&self, rows: &[usize]) -> RowMatrix {
        let mut out = RowMatrix::with_capacity(self.width, rows.len());
        for &r in rows {
            out.push_row(self.row(r));
        }
        out
    }
}

/// Cell for a number (NaN bits when missing).
pub fn number_cell(v: Option<f32>) -> u32 {
    v.unwrap_or(f32::NAN).to_bits()
}

/// Which side of the split a row falls on, from a hash of its cells'
/// meaning (number bits and category text), so identical rows always land
/// together and the answer never changes as the store grows.
pub fn is_holdout(row_key: &[u8], fraction: f64) -> bool {
    let h = blake3::keyed_hash(&HOLDOUT_KEY, row_key);
    let x = u64::from_le_bytes(h.as_bytes()[..8].try_into().expect("8 bytes"));
    // Top 53 bits as a uniform number in [0, 1).
    ((x >> 11) as f64) * (1.0 / (1u64 << 53) as f64) < fraction
}

const HOLDOUT_KEY: [u8; 32] = *b"tidegate holdout split key v1...";

/// How the network sees one input column.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum InputEncoding {
    /// Standardised: (x − mean) / std; missing becomes 0 (the mean).
    Number { column: usize, mean: f32, std: f32 },
    /// One-hot over `width` codes; missing and unseen codes are all zeros.
    OneHot { column: usize, width: usize },
}

/// Maps stored rows to the network's input matrix and target vector.
/// Scaler stats are frozen when a model is trained cold and travel with its
/// checkpoint, so the same rows always give the same features.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FeatureSpec {
    pub inputs: Vec<InputEncoding>,
    pub target: usize,
    pub task: Task,
    /// Number of classes for classification, 1 for regression.
    pub outputs: usize,
}

impl FeatureSpec {
    /// Builds the encoding from column stats and vocabularies.
    pub fn new(schema: &Schema, stats: &ColumnStats, vocabs: &Vocabularies) -> FeatureSpec {
        let inputs = schema
            .inputs()
            .map(|ci| match schema.columns[ci].kind {
                ColumnKind::Number => {
                    let st = stats.numbers.get(&ci).copied().unwrap_or_default();
                    let sd = st.std_dev();
                    InputEncoding::Number {
                        column: ci,
                        mean: st.mean as f32,
                        std: if sd > 1e-12 { sd as f32 } else { 1.0 },
                    }
                }
                ColumnKind::Category => InputEncoding::OneHot {
                    column: ci,
                    width: vocabs.get(&ci).map_or(0, Vocab::len),
                },
            })
            .collect();
        let outputs = match schema.task {
            Task::Regression => 1,
            Task::Classification => vocabs.get(&schema.target).map_or(0, Vocab::len),
        };
        FeatureSpec {
            inputs,
            target: schema.target,
            task: schema.task,
            outputs,
        }
    }

    /// Width of the network's input.
    pub fn width(&self) -> usize {
        self.inputs
            .iter()
            .map(|e| match e {
                InputEncoding::Number { .. } => 1,
                InputEncoding::OneHot { width, .. } => *width,
            })
            .sum()
    }

    /// Row-major `n_rows × width()` input matrix.
    pub fn encode_inputs(&self, rows: &RowMatrix) -> Vec<f32> {
        let w = self.width();
        let mut x = vec![0.0f32; rows.n_rows() * w];
        for r in 0..rows.n_rows() {
            let out = &mut x[r * w..(r + 1) * w];
            let mut at = 0;
            for e in &self.inputs {
                match *e {
                    InputEncoding::Number { column, mean, std } => {
                        if let Some(v) = rows.number(r, column) {
                            out[at] = (v - mean) / std;
                        }
                        at += 1;
                    }
                    InputEncoding::OneHot { column, width } => {
                        if let Some(code) = rows.code(r, column)
                            && (code as usize) < width
                        {
                            out[at + code as usize] = 1.0;
                        }
                        at += width;
                    }
                }
            }
        }
        x
    }

    /// Targets: the value for regression, the class code (as f32) for
    /// classification. Rows with a missing target give NaN.
    pub fn encode_targets(&self, rows: &RowMatrix) -> Vec<f32> {
        (0..rows.n_rows())
            .map(|r| match self.task {
                Task::Regression => rows.number(r, self.target).unwrap_or(f32::NAN),
                Task::Classification => rows.code(r, self.target).map_or(f32::NAN, |c| c as f32),
            })
            .collect()
    }
}

/// How stored rows map onto a changed schema: for each new column, the old
/// column it comes from (`None`: added, stored rows get a missing value).
#[derive(Debug, Clone, PartialEq)]
pub struct Migration {
    pub from_old: Vec<Option<usize>>,
    pub added: Vec<String>,
    pub removed: Vec<String>,
    /// Columns whose `required`, `min` or `max` changed.
    pub changed: Vec<String>,
}

/// Checks that `new` can take the rows stored under `old` and says how.
/// Allowed: adding optional columns, removing input columns, reordering,
/// and changing `required`, `min` and `max`. Refused, with the reason: a
/// changed target or task, a column whose kind changed, a new required
/// column (stored rows have no value for it).
pub fn plan_migration(old: &Schema, new: &Schema) -> Result<Migration, String> {
    if old.task != new.task {
        return Err(format!(
            "the task changed ({} to {}); start a new state dir for a different task",
            old.task, new.task
        ));
    }
    let (old_target, new_target) = (&old.columns[old.target].name, &new.columns[new.target].name);
    if old_target != new_target {
        return Err(format!(
            "the target changed ({old_target} to {new_target}); start a new state dir for a different target"
        ));
    }
    let mut from_old = Vec::with_capacity(new.width());
    let mut added = Vec::new();
    let mut changed = Vec::new();
    for col in &new.columns {
        match old.index_of(&col.name) {
            Some(i) => {
                let was = &old.columns[i];
                if was.kind != col.kind {
                    return Err(format!(
                        "column {} changed kind ({} to {}); stored values cannot be reread — \
                         add a column under a new name instead",
                        col.name, was.kind, col.kind
                    ));
                }
                if was.required != col.required || was.min != col.min || was.max != col.max {
                    changed.push(col.name.clone());
                }
                from_old.push(Some(i));
            }
            None => {
                if col.required {
                    return Err(format!(
                        "new column {} must have required = false: the stored rows have no value for it",
                        col.name
                    ));
                }
                added.push(col.name.clone());
                from_old.push(None);
            }
        }
    }
    let removed: Vec<String> = old
        .columns
        .iter()
        .filter(|c| new.index_of(&c.name).is_none())
        .map(|c| c.name.clone())
        .collect();
    Ok(Migration {
        from_old,
        added,
        removed,
        changed,
    })
}

impl Migration {
    /// Stored rows in the new layout.
    pub fn rows(&self, old_rows: &RowMatrix, new: &Schema) -> RowMatrix {
        let mut out = RowMatrix::with_capacity(new.width(), old_rows.n_rows());
        let mut row = vec![0u32; new.width()];
        for r in 0..old_rows.n_rows() {
            let old = old_rows.row(r);
            for (j, from) in self.from_old.iter().enumerate() {
                row[j] = match from {
                    Some(i) => old[*i],
                    None => match new.columns[j].kind {
                        ColumnKind::Number => number_cell(None),
                        ColumnKind::Category => MISSING_CODE,
                    },
                };
            }
            out.push_row(&row);
        }
        out
    }

    /// Column statistics keyed by the new column indexes.
    pub fn stats(&self, old: &ColumnStats) -> ColumnStats {
        let mut out = ColumnStats::default();
        for (j, from) in self.from_old.iter().enumerate() {
            if let Some(i) = from {
                if let Some(s) = old.numbers.get(i) {
                    out.numbers.insert(j, *s);
                }
                if let Some(m) = old.missing.get(i) {
                    out.missing.insert(j, *m);
                }
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn col(kind: ColumnKind) -> Column {
        Column {
            name: "c".into(),
            kind,
            min: Some(0.0),
            max: Some(10.0),
            required: true,
        }
    }

    #[test]
    fn welford_and_chan_merge() {
        // Welford (1962) and the Chan–Golub–LeVeque (1983) pairwise merge:
        // {2,4,4,4} ∪ {5,5,7,9} has mean 5, M2 = 32, population variance 4
        // (worked example listed in CHECKS.md).
        let mut a = RunningStats::default();
        let mut b = RunningStats::default();
        for x in [2.0, 4.0, 4.0, 4.0] {
            a.push(x);
        }
        for x in [5.0, 5.0, 7.0, 9.0] {
            b.push(x);
        }
        let m = a.merge(&b);
        assert_eq!(m.count, 8);
        assert!((m.mean - 5.0).abs() < 1e-12);
        assert!((m.m2 - 32.0).abs() < 1e-12);
        assert!((m.population_variance() - 4.0).abs() < 1e-12);
        assert_eq!((m.min, m.max), (2.0, 9.0));
        // The merge equals pushing everything into one accumulator.
        let mut all = RunningStats::default();
        for x in [2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0] {
            all.push(x);
        }
        assert!((all.m2 - m.m2).abs() < 1e-12 && (all.mean - m.mean).abs() < 1e-12);
        assert_eq!(RunningStats::default().merge(&a), a);
    }

    #[test]
    fn number_parsing_rules() {
        let c = col(ColumnKind::Number);
        assert_eq!(parse_number(&c, " 2.5 "), Ok(Some(2.5)));
        assert_eq!(parse_number(&c, ""), Err(FieldProblem::Missing));
        assert_eq!(parse_number(&c, "NaN"), Err(FieldProblem::NotFinite));
        assert_eq!(parse_number(&c, "inf"), Err(FieldProblem::NotFinite));
        assert_eq!(parse_number(&c, "1e999"), Err(FieldProblem::NotFinite));
        assert_eq!(parse_number(&c, "abc"), Err(FieldProblem::NotANumber));
        assert_eq!(parse_number(&c, "-1"), Err(FieldProblem::BelowMin(0.0)));
        assert_eq!(parse_number(&c, "11"), Err(FieldProblem::AboveMax(10.0)));
        let opt = Column {
            required: false,
            ..c
        };
        assert_eq!(parse_number(&opt, ""), Ok(None));
    }

    #[test]
    fn vocab_grows_and_keeps_codes() {
        let mut v = Vocab::default();
        assert_eq!(v.code_or_insert("a"), (0, true));
        assert_eq!(v.code_or_insert("b"), (1, true));
        assert_eq!(v.code_or_insert("a"), (0, false));
        let again = Vocab::from_values(v.values().to_vec());
        assert_eq!(again.code("b"), Some(1));
        assert_eq!(again.value(0), Some("a"));
    }

    #[test]
    fn holdout_share_is_close_to_fraction() {
        let n = 20_000;
        let hits = (0..n)
            .filter(|i: &u32| is_holdout(&i.to_le_bytes(), 0.2))
            .count();
        let share = hits as f64 / f64::from(n);
        // Binomial sd at n = 20000, p = 0.2 is 0.0028; allow 4 sd.
        assert!((share - 0.2).abs() < 0.012, "share {share}");
        assert!(is_holdout(b"same", 0.5) == is_holdout(b"same", 0.5));
    }

    #[test]
    fn features_standardise_and_one_hot() {
        let schema = Schema {
            columns: vec![
                Column {
                    name: "x".into(),
                    kind: ColumnKind::Number,
                    min: None,
                    max: None,
                    required: false,
                },
                Column {
                    name: "k".into(),
                    kind: ColumnKind::Category,
                    min: None,
                    max: None,
                    required: false,
                },
                Column {
                    name: "y".into(),
                    kind: ColumnKind::Number,
                    min: None,
                    max: None,
                    required: true,
                },
            ],
            target: 2,
            task: Task::Regression,
        };
        let mut rows = RowMatrix::new(3);
        rows.push_row(&[number_cell(Some(1.0)), 0, number_cell(Some(10.0))]);
        rows.push_row(&[number_cell(Some(3.0)), 1, number_cell(Some(20.0))]);
        rows.push_row(&[number_cell(None), MISSING_CODE, number_cell(Some(30.0))]);
        let stats = ColumnStats::of_rows(&schema, &rows);
        let mut vocabs = Vocabularies::new();
        vocabs.insert(1, Vocab::from_values(vec!["a".into(), "b".into()]));
        let spec = FeatureSpec::new(&schema, &stats, &vocabs);
        assert_eq!(spec.width(), 3);
        let x = spec.encode_inputs(&rows);
        let s = std::f32::consts::SQRT_2; // sample sd of {1, 3}
        let want = [-1.0 / s, 1.0, 0.0, 1.0 / s, 0.0, 1.0, 0.0, 0.0, 0.0];
        for (a, b) in x.iter().zip(want) {
            assert!((a - b).abs() < 1e-6, "{x:?}");
        }
        assert_eq!(spec.encode_targets(&rows), vec![10.0, 20.0, 30.0]);
        assert_eq!(stats.missing.get(&0), Some(&1));
    }

    fn schema_of(cols: &[(&str, ColumnKind, bool)], target: &str) -> Schema {
        let columns: Vec<Column> = cols
            .iter()
            .map(|(n, k, r)| Column {
                name: n.to_string(),
                kind: *k,
                min: None,
                max: None,
                required: *r,
            })
            .collect();
        let target = columns.iter().position(|c| c.name == target).unwrap();
        Schema {
            columns,
            target,
            task: Task::Regression,
        }
    }

    #[test]
    fn migration_maps_rows_by_column_name() {
        use ColumnKind::{Category, Number};
        let old = schema_of(
            &[
                ("a", Number, true),
                ("shop", Category, true),
                ("y", Number, true),
            ],
            "y",
        );
        // Reordered, `a` removed, `rain` (optional) added.
        let new = schema_of(
            &[
                ("y", Number, true),
                ("rain", Number, false),
                ("shop", Category, true),
            ],
            "y",
        );
        let m = plan_migration(&old, &new).unwrap();
        assert_eq!(m.from_old, vec![Some(2), None, Some(1)]);
        assert_eq!(
            (m.added.clone(), m.removed.clone()),
            (vec!["rain".to_string()], vec!["a".to_string()])
        );
        let rows =
            RowMatrix::from_cells(3, vec![number_cell(Some(1.5)), 7, number_cell(Some(9.0))]);
        let moved = m.rows(&rows, &new);
        assert_eq!(moved.number(0, 0), Some(9.0));
        assert_eq!(moved.number(0, 1), None, "the new column is missing");
        assert_eq!(moved.code(0, 2), Some(7));
        let mut stats = ColumnStats::default();
        stats.numbers.insert(
            2,
            RunningStats {
                count: 1,
                mean: 9.0,
                ..RunningStats::default()
            },
        );
        assert_eq!(m.stats(&stats).numbers.get(&0).map(|s| s.mean), Some(9.0));
        // Refused changes say why.
        let kind = schema_of(
            &[
                ("a", Category, true),
                ("shop", Category, true),
                ("y", Number, true),
            ],
            "y",
        );
        assert!(
            plan_migration(&old, &kind)
                .unwrap_err()
                .contains("changed kind")
        );
        let required = schema_of(
            &[
                ("a", Number, true),
                ("shop", Category, true),
                ("rain", Number, true),
                ("y", Number, true),
            ],
            "y",
        );
        assert!(
            plan_migration(&old, &required)
                .unwrap_err()
                .contains("required = false")
        );
        let target = schema_of(
            &[
                ("a", Number, true),
                ("shop", Category, true),
                ("y", Number, true),
            ],
            "a",
        );
        assert!(
            plan_migration(&old, &target)
                .unwrap_err()
                .contains("target changed")
        );
    }

    mod plain_decimal_tests {
        use super::super::plain_decimal;
        use proptest::prelude::*;

        proptest! {
            #![proptest_config(ProptestConfig::with_cases(5000))]
            #[test]
            fn agrees_with_the_standard_parser(text in "[+-]?[0-9]{0,9}(\\.[0-9]{0,11})?") {
                let general = text.parse::<f32>().ok();
                if let Some(v) = plain_decimal(text.as_bytes()) {
                    prop_assert_eq!(Some(v.to_bits()), general.map(f32::to_bits), "{}", text);
                }
            }
        }

        #[test]
        fn takes_plain_decimals_and_leaves_the_rest() {
            assert_eq!(plain_decimal(b"12.5"), Some(12.5));
            assert_eq!(plain_decimal(b"-0.1"), Some(-0.1));
            assert_eq!(plain_decimal(b"+7"), Some(7.0));
            assert_eq!(plain_decimal(b"16777216"), Some(16_777_216.0));
            for other in [
                &b""[..],
                b".",
                b"-",
                b"1e5",
                b" 1",
                b"1,5",
                b"1.2.3",
                b"16777217",
                b"0.12345678901",
                b"nan",
            ] {
                assert_eq!(
                    plain_decimal(other),
                    None,
                    "{}",
                    String::from_utf8_lossy(other)
                );
            }
        }
    }
}
