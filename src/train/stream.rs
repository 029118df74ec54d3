//! Cold training on more rows than a cycle's memory budget holds. The
//! training rows are cut into blocks of contiguous stored rows (never
//! across a batch). Every epoch visits the blocks in a new seeded order, a
//! window of a few blocks at a time: the window's rows are shuffled
//! together and cut into mini-batches, and the rows too few to fill a last
//! mini-batch wait for the next window. So each training row is trained on
//! exactly once per epoch while only one window of encoded rows is held,
//! and a mini-batch mixes rows of several batches (days) as in memory.
//!
//! Validation rows for early stopping are a seeded uniform sample of the
//! training rows, as many as `validation_fraction` asks but capped by the
//! budget, held for the whole run; they are left out of every epoch. The
//! input standardisation is the caller's (from the store's running
//! statistics, no rows read); the target scale comes from one pass over
//! the training rows before the first epoch, in store order, as the
//! in-memory run computes it.
//!
//! The pure parts (blocks, window orders, sizes from the budget) are
//! separate from the run; the store is reached only through [`Rows`].

use std::time::Instant;

use super::{Data, Epochs, SPLIT, Step, TrainError, Trained, no_rows, stream};
use crate::config::{ModelConfig, Task, TrainingConfig};
use crate::ids::BatchId;
use crate::model::TargetScale;
use crate::model::checkpoint::Streamed;
use crate::rng::Rng;
use crate::schema::{FeatureSpec, RowMatrix, RunningStats};

use super::Control;

/// Contiguous stored training rows of one batch.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Block {
    pub batch: BatchId,
    /// First row, counted within the batch's training rows.
    pub start: usize,
    pub len: usize,
    /// First row, counted among all training rows in store order (what
    /// `Store::rows(Split::Train, None, None)` would return).
    pub base: usize,
}

/// Cuts each batch's rows (`counts`, in store order) into blocks of at
/// most `block_rows` rows.
pub fn blocks(counts: &[(BatchId, usize)], block_rows: usize) -> Vec<Block> {
    let size = block_rows.max(1);
    let mut out = Vec::new();
    let mut base = 0;
    for &(batch, n) in counts {
        let mut start = 0;
        while start < n {
            let len = size.min(n - start);
            out.push(Block {
                batch,
                start,
                len,
                base: base + start,
            });
            start += len;
        }
        base += n;
    }
    out
}

/// One epoch's visit: the block indices `0..blocks` in a new order, cut
/// into windows of `window_blocks` (the last may be shorter).
pub fn epoch_windows(blocks: usize, window_blocks: usize, rng: &mut Rng) -> Vec<Vec<usize>> {
    let mut order: Vec<usize> = (0..blocks).collect();
    rng.shuffle(&mut order);
    order
        .chunks(window_blocks.max(1))
        .map(<[usize]>::to_vec)
        .collect()
}

/// Bytes of one encoded row: inputs and target as f32.
fn encoded_bytes(width: usize) -> u64 {
    4 * (width as u64 + 1)
}

/// Bytes a cold run takes when it holds all `rows` training rows: their
/// cells (`columns` u32 each), the encoded rows, and the training and
/// validation copies made from them, which live beside the encoded rows
/// for the whole run.
pub fn held_bytes(rows: usize, columns: usize, width: usize) -> u64 {
    rows as u64 * (4 * columns as u64 + 2 * encoded_bytes(width))
}

/// How a streamed run uses its budget.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Sizes {
    pub block_rows: usize,
    pub window_blocks: usize,
    /// Most validation rows held.
    pub validation_cap: usize,
}

impl Sizes {
    /// Bytes these sizes take at most: the validation rows (while read:
    /// cells and two encoded copies), a window of encoded rows with their
    /// place in the shuffle plus the rows carried from the window before,
    /// and one block being read (cells and two encoded copies).
    pub fn bytes(&self, columns: usize, width: usize, batch_size: usize) -> u64 {
        let enc = encoded_bytes(width);
        let read = 4 * columns as u64 + 2 * enc;
        let window = (self.window_blocks * self.block_rows + batch_size) as u64;
        self.validation_cap as u64 * read + window * (enc + 8) + self.block_rows as u64 * read
    }
}

/// Fewest and most rows in a block: fewer makes a read per handful of
/// rows; more makes a window of few blocks, so rows of few batches mix.
const BLOCK_ROWS: (usize, usize) = (64, 8192);

/// Blocks a window aims for: enough that a mini-batch draws from many
/// batches' rows.
const WINDOW_BLOCKS: usize = 16;

/// Fewest validation rows a streamed run holds (unless `validation_fraction`
/// asks for fewer), whatever the budget: early stopping on a handful of
/// rows stops at a chance dip. A fixed cost, not one that grows with the
/// store (common practice, no source).
pub const VALIDATION_MIN: usize = 2000;

/// Sizes for a streamed run within `budget` bytes: a quarter for the
/// validation rows (at least [`VALIDATION_MIN`]), the rest for the window
/// and the block being read. Set by the budget and the row width alone, so
/// the memory a run takes does not grow with the store. A budget too small
/// for one block still gets one block of the smallest size per window (at
/// least a mini-batch is always held).
pub fn sizes(budget: u64, columns: usize, width: usize, batch_size: usize) -> Sizes {
    let enc = encoded_bytes(width);
    let read = 4 * columns as u64 + 2 * enc;
    let validation_cap = ((budget / 4 / read) as usize).max(VALIDATION_MIN);
    let window_budget = budget - budget / 4;
    let window_rows = (window_budget / (enc + 8)) as usize;
    let block_rows = (window_rows / WINDOW_BLOCKS).clamp(BLOCK_ROWS.0, BLOCK_ROWS.1);
    let reading = block_rows as u64 * read + batch_size as u64 * (enc + 8);
    let left = window_budget.saturating_sub(reading) / (enc + 8);
    Sizes {
        block_rows,
        window_blocks: (left as usize / block_rows).max(1),
        validation_cap,
    }
}

/// What a cycle does with a cold candidate's rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColdRows {
    /// All in memory: they fit (and the run is exactly the in-memory one).
    Held,
    Streamed(Sizes),
}

/// Held when `rows` training rows fit in `left` bytes (what the cycle's
/// budget leaves after its other rows), else streamed within `left`.
pub fn cold_rows(left: u64, rows: usize, columns: usize, width: usize, batch: usize) -> ColdRows {
    if held_bytes(rows, columns, width) <= left {
        ColdRows::Held
    } else {
        ColdRows::Streamed(sizes(left, columns, width, batch))
    }
}

/// Where a streamed run reads its rows.
pub trait Rows {
    /// The rows of one block, in store order.
    fn block(&self, block: &Block) -> Result<RowMatrix, String>;
    /// The training rows at strictly ascending positions (counted as
    /// [`Block::base`] counts).
    fn at(&self, positions: &[usize]) -> Result<RowMatrix, String>;
}

/// Trains a new model from scratch by streaming the training rows whose
/// per-batch counts are `counts` from `source`, within `sizes`.
/// `budget_mb` is only recorded in the summary.
#[allow(clippy::too_many_arguments)]
pub fn train_cold(
    spec: &FeatureSpec,
    model_config: &ModelConfig,
    cfg: &TrainingConfig,
    counts: &[(BatchId, usize)],
    sizes: Sizes,
    budget_mb: u64,
    source: &dyn Rows,
    control: Control<'_>,
) -> Result<Trained, TrainError> {
    let started = Instant::now();
    let n: usize = counts.iter().map(|(_, c)| c).sum();
    let mut rng = stream(cfg.seed, SPLIT);
    let fraction = if cfg.patience == 0 {
        0.0
    } else {
        cfg.validation_fraction
    };
    let n_val = if fraction <= 0.0 || n < 2 {
        0
    } else {
        ((n as f64 * fraction).round() as usize)
            .clamp(1, n - 1)
            .min(sizes.validation_cap)
    };
    let validation = crate::sample::choose(n, n_val, &mut rng);
    let mut epochs = Window {
        source,
        spec,
        target: TargetScale::IDENTITY,
        blocks: blocks(counts, sizes.block_rows),
        window_blocks: sizes.window_blocks,
        block_rows: sizes.block_rows,
        validation: &validation,
        rows: 0,
        budget_mb,
        rng,
    };
    let (rows, target) = epochs.first_pass()?;
    if rows == 0 {
        return Err(no_rows("training", spec.task));
    }
    epochs.rows = rows;
    epochs.target = target;
    let mut val = encode(
        spec,
        &source.at(&validation).map_err(TrainError::Rows)?,
        target,
    );
    if val.n() == 0 {
        // Every sampled row lacked a usable target: no early stopping.
        val = Data {
            width: spec.width(),
            ..Data::default()
        };
    }
    let (model, run) = super::cold_start(spec, model_config, target, cfg, control, started)?;
    run.fit(model, &mut epochs, &val)
}

/// Rows encoded for training: usable targets only, scaled.
fn encode(spec: &FeatureSpec, rows: &RowMatrix, target: TargetScale) -> Data {
    let (x, y) = Data::encode(spec, rows);
    let mut d = Data {
        x,
        y,
        width: spec.width(),
    };
    d.scale_targets(spec.task, target);
    d
}

/// The epochs of a streamed run.
struct Window<'a> {
    source: &'a dyn Rows,
    spec: &'a FeatureSpec,
    target: TargetScale,
    blocks: Vec<Block>,
    window_blocks: usize,
    block_rows: usize,
    /// Positions held for validation, ascending; left out of every epoch.
    validation: &'a [usize],
    /// Usable training rows (after the first pass).
    rows: usize,
    budget_mb: u64,
    rng: Rng,
}

impl Window<'_> {
    /// A block's rows without the validation rows among them.
    fn read(&self, block: &Block) -> Result<RowMatrix, TrainError> {
        let rows = self.source.block(block).map_err(TrainError::Rows)?;
        if rows.n_rows() != block.len {
            return Err(TrainError::Rows(format!(
                "batch {} gave {} rows for a block of {}",
                block.batch,
                rows.n_rows(),
                block.len
            )));
        }
        let lo = self.validation.partition_point(|&p| p < block.base);
        let hi = self
            .validation
            .partition_point(|&p| p < block.base + block.len);
        if lo == hi {
            return Ok(rows);
        }
        let held = &self.validation[lo..hi];
        let keep: Vec<usize> = (0..block.len)
            .filter(|r| held.binary_search(&(block.base + r)).is_err())
            .collect();
        Ok(rows.select(&keep))
    }

    /// One pass over the training rows in store order: how many have a
    /// usable target, and the target scale (mean and sd of the regression
    /// targets; identity for classes).
    fn first_pass(&self) -> Result<(usize, TargetScale), TrainError> {
        let spec = self.spec;
        let mut stats = RunningStats::default();
        let mut usable = 0;
        for block in &self.blocks {
            let rows = self.read(block)?;
            for t in spec.encode_targets(&rows) {
                let ok =
                    !t.is_nan() && (spec.task == Task::Regression || (t as usize) < spec.outputs);
                if ok {
                    usable += 1;
                    stats.push(f64::from(t));
                }
            }
        }
        let scale = match spec.task {
            Task::Regression => {
                let sd = stats.std_dev();
                TargetScale {
                    mean: stats.mean,
                    std: if sd > 1e-12 { sd } else { 1.0 },
                }
            }
            Task::Classification => TargetScale::IDENTITY,
        };
        Ok((usable, scale))
    }
}

impl Epochs for Window<'_> {
    fn rows(&self) -> (usize, usize) {
        (self.rows, 0)
    }

    fn epoch(&mut self, batch_size: usize, step: &mut Step<'_>) -> Result<usize, TrainError> {
        let width = self.spec.width();
        let windows = epoch_windows(self.blocks.len(), self.window_blocks, &mut self.rng);
        let mut pool = Data {
            width,
            ..Data::default()
        };
        let (mut xb, mut yb) = (Vec::new(), Vec::new());
        let mut order = Vec::new();
        let mut handed = 0;
        for (w, window) in windows.iter().enumerate() {
            for &b in window {
                let rows = self.read(&self.blocks[b])?;
                pool.append(&encode(self.spec, &rows, self.target));
            }
            order.clear();
            order.extend(0..pool.n());
            self.rng.shuffle(&mut order);
            // Whole mini-batches only, but for the epoch's last window.
            let last = w + 1 == windows.len();
            let take = if last {
                order.len()
            } else {
                order.len() / batch_size * batch_size
            };
            for chunk in order[..take].chunks(batch_size) {
                xb.clear();
                yb.clear();
                for &i in chunk {
                    xb.extend_from_slice(&pool.x[i * width..(i + 1) * width]);
                    yb.push(pool.y[i]);
                }
                if !step(&xb, &yb)? {
                    return Ok(handed);
                }
                handed += chunk.len();
            }
            pool = pool.subset(&order[take..]);
        }
        Ok(handed)
    }

    fn streamed(&self) -> Option<Streamed> {
        Some(Streamed {
            budget_mb: self.budget_mb,
            blocks: self.blocks.len(),
            block_rows: self.block_rows,
            window_blocks: self.window_blocks,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::test_spec;
    use crate::schema::number_cell;
    use std::cell::RefCell;

    /// Rows whose only input is their own position and whose target is a
    /// line in it, in batches of the given sizes.
    fn numbered(counts: &[usize]) -> (Vec<(BatchId, usize)>, RowMatrix) {
        let n: usize = counts.iter().sum();
        let mut rows = RowMatrix::new(2);
        for i in 0..n {
            let x = i as f32;
            rows.push_row(&[number_cell(Some(x)), number_cell(Some(0.5 * x - 3.0))]);
        }
        let counts = counts
            .iter()
            .enumerate()
            .map(|(b, &c)| (BatchId(b as u64 + 1), c))
            .collect();
        (counts, rows)
    }

    /// The rows in memory, read the way the store reads them.
    struct InMemory {
        rows: RowMatrix,
        reads: RefCell<usize>,
    }

    impl Rows for InMemory {
        fn block(&self, block: &Block) -> Result<RowMatrix, String> {
            *self.reads.borrow_mut() += 1;
            let at: Vec<usize> = (block.base..block.base + block.len).collect();
            Ok(self.rows.select(&at))
        }
        fn at(&self, positions: &[usize]) -> Result<RowMatrix, String> {
            Ok(self.rows.select(positions))
        }
    }

    #[test]
    fn blocks_cover_each_batch_in_order_and_never_cross_one() {
        let counts = [(BatchId(1), 10), (BatchId(2), 0), (BatchId(4), 7)];
        let b = blocks(&counts, 4);
        let lens: Vec<(u64, usize, usize, usize)> = b
            .iter()
            .map(|b| (b.batch.0, b.start, b.len, b.base))
            .collect();
        assert_eq!(
            lens,
            vec![
                (1, 0, 4, 0),
                (1, 4, 4, 4),
                (1, 8, 2, 8),
                (4, 0, 4, 10),
                (4, 4, 3, 14)
            ]
        );
        assert!(blocks(&[], 4).is_empty());
    }

    #[test]
    fn each_epoch_visits_every_block_once_in_a_new_order() {
        let mut rng = Rng::new(9);
        let a = epoch_windows(50, 8, &mut rng);
        let b = epoch_windows(50, 8, &mut rng);
        assert_eq!(a.len(), 7);
        assert!(a[..6].iter().all(|w| w.len() == 8));
        assert_eq!(a[6].len(), 2);
        for w in [&a, &b] {
            let mut all: Vec<usize> = w.iter().flatten().copied().collect();
            all.sort_unstable();
            assert_eq!(all, (0..50).collect::<Vec<_>>());
        }
        assert_ne!(a, b, "the block order changes from epoch to epoch");
    }

    #[test]
    fn streamed_epochs_train_on_every_row_but_the_validation_rows_exactly_once() {
        let (counts, rows) = numbered(&[300, 45, 0, 512, 7]);
        let n = rows.n_rows();
        let spec = test_spec(1, Task::Regression, 1);
        let source = InMemory {
            rows,
            reads: RefCell::new(0),
        };
        let validation = crate::sample::choose(n, 90, &mut Rng::new(3));
        let mut w = Window {
            source: &source,
            spec: &spec,
            target: TargetScale::IDENTITY,
            blocks: blocks(&counts, 32),
            window_blocks: 3,
            block_rows: 32,
            validation: &validation,
            rows: 0,
            budget_mb: 1,
            rng: Rng::new(11),
        };
        let (usable, _) = w.first_pass().unwrap();
        assert_eq!(usable, n - 90);
        let batch = 20;
        let mut orders = Vec::new();
        for _ in 0..2 {
            let mut seen = Vec::new();
            let mut sizes = Vec::new();
            let handed = w
                .epoch(batch, &mut |x, y| {
                    assert_eq!(x.len(), y.len());
                    sizes.push(y.len());
                    seen.extend(x.iter().map(|&v| v as usize));
                    Ok(true)
                })
                .unwrap();
            assert_eq!(handed, n - 90);
            // Every mini-batch is whole but the epoch's last.
            assert!(sizes[..sizes.len() - 1].iter().all(|&s| s == batch));
            let mut sorted = seen.clone();
            sorted.sort_unstable();
            let want: Vec<usize> = (0..n)
                .filter(|p| validation.binary_search(p).is_err())
                .collect();
            assert_eq!(sorted, want, "each training row once, no validation row");
            orders.push(seen);
        }
        assert_ne!(orders[0], orders[1], "rows come in a new order each epoch");
        // A mini-batch mixes rows of several blocks: rows that sat next to
        // each other in the store rarely stay together.
        let adjacent = orders[0]
            .windows(2)
            .filter(|p| p[0].abs_diff(p[1]) == 1)
            .count();
        assert!(
            adjacent < orders[0].len() / 10,
            "{adjacent} neighbours kept"
        );
    }

    #[test]
    fn a_step_that_stops_ends_the_epoch_early() {
        let (counts, rows) = numbered(&[200]);
        let spec = test_spec(1, Task::Regression, 1);
        let source = InMemory {
            rows,
            reads: RefCell::new(0),
        };
        let mut w = Window {
            source: &source,
            spec: &spec,
            target: TargetScale::IDENTITY,
            blocks: blocks(&counts, 16),
            window_blocks: 2,
            block_rows: 16,
            validation: &[],
            rows: 200,
            budget_mb: 1,
            rng: Rng::new(1),
        };
        let mut calls = 0;
        let handed = w
            .epoch(10, &mut |_, _| {
                calls += 1;
                Ok(calls < 3)
            })
            .unwrap();
        assert_eq!(handed, 20);
        assert_eq!(calls, 3);
    }

    #[test]
    fn sizes_fit_the_budget_and_do_not_depend_on_the_store() {
        for &(budget_mb, columns, width) in
            &[(64u64, 12, 20), (256, 12, 20), (32, 40, 300), (1024, 5, 8)]
        {
            let budget = budget_mb << 20;
            let s = sizes(budget, columns, width, 256);
            assert!(
                s.bytes(columns, width, 256) <= budget,
                "{s:?} over {budget_mb} MiB"
            );
            // Most of the budget is used: at least half.
            assert!(
                s.bytes(columns, width, 256) * 2 >= budget,
                "{s:?} wastes {budget_mb} MiB"
            );
            assert!((BLOCK_ROWS.0..=BLOCK_ROWS.1).contains(&s.block_rows));
            assert!(s.window_blocks >= WINDOW_BLOCKS / 2, "{s:?}");
        }
        // A budget below one block still streams a block at a time.
        let tiny = sizes(1000, 12, 20, 256);
        assert_eq!(tiny.window_blocks, 1);
        assert_eq!(tiny.block_rows, BLOCK_ROWS.0);
        assert_eq!(tiny.validation_cap, VALIDATION_MIN);
    }

    #[test]
    fn rows_are_held_while_they_fit_and_streamed_after() {
        let (columns, width) = (12, 20);
        let per_row = held_bytes(1, columns, width);
        assert_eq!(per_row, 4 * 12 + 2 * 4 * 21);
        assert_eq!(held_bytes(1000, columns, width), 1000 * per_row);
        let left = 1_000_000 * per_row;
        assert_eq!(
            cold_rows(left, 1_000_000, columns, width, 256),
            ColdRows::Held
        );
        let ColdRows::Streamed(s) = cold_rows(left, 1_000_001, columns, width, 256) else {
            panic!("one row more than fits streams");
        };
        assert_eq!(s, sizes(left, columns, width, 256));
        // Streaming a store 50 times larger takes the same sizes.
        assert_eq!(
            cold_rows(left, 50_000_000, columns, width, 256),
            ColdRows::Streamed(s)
        );
    }

    #[test]
    fn a_streamed_run_learns_the_line_and_reads_within_its_blocks() {
        // y = 0.5·x − 3 with x = the position / 100: a linear network
        // recovers it whether its rows are held or streamed.
        let n = 2000;
        let mut rows = RowMatrix::new(2);
        for i in 0..n {
            let x = i as f32 / 100.0;
            rows.push_row(&[number_cell(Some(x)), number_cell(Some(0.5 * x - 3.0))]);
        }
        let counts = vec![(BatchId(1), 700), (BatchId(2), 1300)];
        let source = InMemory {
            rows,
            reads: RefCell::new(0),
        };
        let mut stats = RunningStats::default();
        for i in 0..n {
            stats.push(i as f64 / 100.0);
        }
        let spec = FeatureSpec {
            inputs: vec![crate::schema::InputEncoding::Number {
                column: 0,
                mean: stats.mean as f32,
                std: stats.std_dev() as f32,
            }],
            target: 1,
            task: Task::Regression,
            outputs: 1,
        };
        let model_config = ModelConfig {
            hidden: vec![],
            ..ModelConfig::default()
        };
        let cfg = TrainingConfig {
            batch_size: 32,
            learning_rate: 1e-2,
            cold_epochs: 40,
            patience: 5,
            ..TrainingConfig::default()
        };
        let s = Sizes {
            block_rows: 100,
            window_blocks: 4,
            validation_cap: 150,
        };
        let t = train_cold(
            &spec,
            &model_config,
            &cfg,
            &counts,
            s,
            1,
            &source,
            Control::default(),
        )
        .unwrap();
        let streamed = t
            .summary
            .streamed
            .clone()
            .expect("the run says it streamed");
        assert_eq!(streamed.blocks, 7 + 13);
        assert_eq!(
            t.summary.validation_rows, 150,
            "capped at the budget's share"
        );
        assert_eq!(t.summary.rows, n - 150);
        // The scale is the training targets': mean about 2 (−3 + 0.5·10).
        assert!((t.model.target_scale().mean - 2.0).abs() < 0.1);
        let mut probe = RowMatrix::new(2);
        probe.push_row(&[number_cell(Some(4.0)), number_cell(Some(-1.0))]);
        let loss = t
            .model
            .row_losses(&probe, crate::config::Backend::Flex)
            .unwrap()[0];
        assert!(loss < 1e-3, "squared error {loss} at x = 4");
        // Each epoch reads every block once, plus the first pass.
        let epochs = t.summary.epochs;
        assert_eq!(*source.reads.borrow(), 20 * (epochs + 1));
    }
}
