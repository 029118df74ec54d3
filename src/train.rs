//! Cold and warm training runs: hand-written mini-batch loops over burn's
//! autodiff and Adam, with seeded shuffles, an inner validation split for
//! early stopping (best weights kept), L2/L1 penalties, replay of older rows
//! and shrink-and-perturb for warm starts, a wall-clock budget, a cancel
//! flag and a progress callback. Nothing here prints.
//!
//! Everything random comes from the project's seeded `Rng` (split, shuffle,
//! replay sample, initial weights, dropout masks), so the same seed, backend,
//! build profile and rows give the same weights. Nothing is global: two runs
//! may go on two threads at once.

use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use burn::optim::GradientsParams;
use burn::tensor::activation::log_softmax;
use burn::tensor::{Tensor, TensorData};

use crate::config::{ModelConfig, Task, TrainingConfig};
use crate::model::{
    LayerWeights, Model, ModelError, RunKind, StopReason, TargetScale, TrainingSummary, device,
    init_weights, layer_widths,
};
use crate::rng::Rng;
use crate::schema::{FeatureSpec, RowMatrix};

/// A training run that did not produce a model.
#[derive(Debug, thiserror::Error)]
pub enum TrainError {
    #[error("training was cancelled")]
    Cancelled,
    #[error("no usable {what} rows to train on (rows need a target value{classes})")]
    NoRows {
        what: &'static str,
        classes: &'static str,
    },
    #[error(
        "the loss became {value} in epoch {epoch}; lower the learning rate or check the data for extreme values"
    )]
    Diverged { epoch: usize, value: f64 },
    #[error(transparent)]
    Model(#[from] ModelError),
    #[error("reading training rows from the store: {0}")]
    Rows(String),
}

/// Where a run is, sent to the progress callback after every mini-batch
/// and at the end of every epoch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Progress {
    pub kind: RunKind,
    /// 1-based epoch.
    pub epoch: usize,
    pub max_epochs: usize,
    /// Mini-batches done in this epoch.
    pub batch: usize,
    pub batches: usize,
    /// Set at the end of an epoch.
    pub train_loss: Option<f64>,
    pub validation_loss: Option<f64>,
    pub elapsed_seconds: f64,
}

/// How the caller steers a run from outside: a cancel flag checked between
/// mini-batches and an optional progress callback.
#[derive(Clone, Copy, Default)]
pub struct Control<'a> {
    pub cancel: Option<&'a AtomicBool>,
    pub progress: Option<&'a dyn Fn(Progress)>,
}

impl std::fmt::Debug for Control<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Control")
            .field("cancel", &self.cancel)
            .finish_non_exhaustive()
    }
}

/// A trained model and what the run did.
#[derive(Debug, Clone)]
pub struct Trained {
    pub model: Model,
    pub summary: TrainingSummary,
}

/// Seeded streams for the separate random needs of one run.
pub(crate) fn stream(seed: u64, purpose: u64) -> Rng {
    Rng::new(seed ^ purpose.wrapping_mul(0x9E37_79B9_7F4A_7C15))
}
pub(crate) const SPLIT: u64 = 1;
pub(crate) const INIT: u64 = 2;
const DROPOUT: u64 = 3;
const PERTURB: u64 = 4;

/// Encoded rows: features row-major, targets scaled for training
/// (standardised value for regression, class code for classification).
#[derive(Debug, Clone, Default)]
pub(crate) struct Data {
    pub(crate) x: Vec<f32>,
    pub(crate) y: Vec<f32>,
    pub(crate) width: usize,
}

impl Data {
    pub(crate) fn n(&self) -> usize {
        self.y.len()
    }

    /// Encodes `rows`, dropping rows without a usable target (missing, or
    /// a class the network has no output for).
    pub(crate) fn encode(spec: &FeatureSpec, rows: &RowMatrix) -> (Vec<f32>, Vec<f32>) {
        let x = spec.encode_inputs(rows);
        let y = spec.encode_targets(rows);
        let w = spec.width();
        let mut xs = Vec::with_capacity(x.len());
        let mut ys = Vec::with_capacity(y.len());
        for (r, &t) in y.iter().enumerate() {
            let usable =
                !t.is_nan() && (spec.task == Task::Regression || (t as usize) < spec.outputs);
            if usable {
                xs.extend_from_slice(&x[r * w..(r + 1) * w]);
                ys.push(t);
            }
        }
        (xs, ys)
    }

    fn subset(&self, idx: &[usize]) -> Data {
        let w = self.width;
        let mut x = Vec::with_capacity(idx.len() * w);
        let mut y = Vec::with_capacity(idx.len());
        for &i in idx {
            x.extend_from_slice(&self.x[i * w..(i + 1) * w]);
            y.push(self.y[i]);
        }
        Data { x, y, width: w }
    }

    pub(crate) fn scale_targets(&mut self, task: Task, scale: TargetScale) {
        if task == Task::Regression {
            for v in &mut self.y {
                *v = ((f64::from(*v) - scale.mean) / scale.std) as f32;
            }
        }
    }

    fn append(&mut self, other: &Data) {
        self.x.extend_from_slice(&other.x);
        self.y.extend_from_slice(&other.y);
    }
}

/// Splits `0..n` into (train, validation) with `fraction` of the rows (at
/// least one, and at least one left to train on) in validation. No split
/// when `fraction` is 0 or there are fewer than two rows.
fn split(n: usize, fraction: f64, rng: &mut Rng) -> (Vec<usize>, Vec<usize>) {
    let mut idx: Vec<usize> = (0..n).collect();
    rng.shuffle(&mut idx);
    let n_val = if fraction <= 0.0 || n < 2 {
        0
    } else {
        ((n as f64 * fraction).round() as usize).clamp(1, n - 1)
    };
    let mut val = idx.split_off(n - n_val);
    idx.sort_unstable();
    val.sort_unstable();
    (idx, val)
}

/// A cold run's freshly initialised model (seeded from `cfg.seed`) and
/// its settings, for the held and the streamed cold runs alike.
pub(crate) fn cold_start<'a>(
    spec: &FeatureSpec,
    model_config: &ModelConfig,
    target: TargetScale,
    cfg: &'a TrainingConfig,
    control: Control<'a>,
    started: Instant,
) -> Result<(Model, Run<'a>), TrainError> {
    let init_seed = stream(cfg.seed, INIT).next_u64();
    let model = Model::new(spec.clone(), model_config, target, cfg.backend, init_seed)?;
    let run = Run {
        kind: RunKind::Cold,
        cfg,
        learning_rate: cfg.learning_rate,
        max_epochs: cfg.cold_epochs,
        control,
        started,
    };
    Ok((model, run))
}

/// Trains a new model from scratch on `rows` with the given feature
/// encoding (scaler stats frozen by the caller). `patience = 0` turns early
/// stopping off and trains on every row.
pub fn train_cold(
    spec: &FeatureSpec,
    model_config: &ModelConfig,
    cfg: &TrainingConfig,
    rows: &RowMatrix,
    control: Control<'_>,
) -> Result<Trained, TrainError> {
    let started = Instant::now();
    let (x, y) = Data::encode(spec, rows);
    let all = Data {
        x,
        y,
        width: spec.width(),
    };
    if all.n() == 0 {
        return Err(no_rows("training", spec.task));
    }
    let mut rng = stream(cfg.seed, SPLIT);
    let fraction = if cfg.patience == 0 {
        0.0
    } else {
        cfg.validation_fraction
    };
    let (train_idx, val_idx) = split(all.n(), fraction, &mut rng);
    let mut train = all.subset(&train_idx);
    let mut val = all.subset(&val_idx);
    let target = match spec.task {
        Task::Regression => TargetScale::of(&train.y),
        Task::Classification => TargetScale::IDENTITY,
    };
    train.scale_targets(spec.task, target);
    val.scale_targets(spec.task, target);
    let (model, run) = cold_start(spec, model_config, target, cfg, control, started)?;
    let fixed = train.n();
    let mut epochs = Held::new(&train, fixed, 0, &mut rng);
    run.fit(model, &mut epochs, &val)
}

/// Continues training `parent` (weights and Adam state) on `new_rows`,
/// mixing in each epoch a fresh sample of `replay_ratio × new rows` from
/// `old_rows`. The parent's feature encoding and target scale are kept.
/// `old_rows` may itself be a uniform sample of the older rows (a cycle
/// passes `cycle::older_sample_size` of them): every row of it is encoded,
/// so its size, not the store's, sets this run's memory.
pub fn train_warm(
    parent: &Model,
    cfg: &TrainingConfig,
    new_rows: &RowMatrix,
    old_rows: &RowMatrix,
    control: Control<'_>,
) -> Result<Trained, TrainError> {
    let started = Instant::now();
    let spec = parent.spec().clone();
    let target = parent.target_scale();
    let (x, y) = Data::encode(&spec, new_rows);
    let mut new = Data {
        x,
        y,
        width: spec.width(),
    };
    if new.n() == 0 {
        return Err(no_rows("new", spec.task));
    }
    let (x, y) = Data::encode(&spec, old_rows);
    let mut old = Data {
        x,
        y,
        width: spec.width(),
    };
    new.scale_targets(spec.task, target);
    old.scale_targets(spec.task, target);

    let mut rng = stream(cfg.seed, SPLIT);
    let fraction = if cfg.patience == 0 {
        0.0
    } else {
        cfg.validation_fraction
    };
    let (new_train_idx, new_val_idx) = split(new.n(), fraction, &mut rng);
    let mut old_idx: Vec<usize> = (0..old.n()).collect();
    rng.shuffle(&mut old_idx);
    let old_val_n =
        ((new_val_idx.len() as f64 * cfg.replay_ratio).round() as usize).min(old.n() / 2);
    let old_val_idx = old_idx.split_off(old.n() - old_val_n);

    let mut pool = new.subset(&new_train_idx);
    let fixed = pool.n();
    pool.append(&old.subset(&old_idx));
    let replay = ((fixed as f64 * cfg.replay_ratio).round() as usize).min(old_idx.len());
    let mut val = new.subset(&new_val_idx);
    val.append(&old.subset(&old_val_idx));

    let mut model = parent.clone();
    model.set_backend(cfg.backend);
    if cfg.shrink != 1.0 || cfg.perturb != 0.0 {
        let widths = layer_widths(&spec, model.config());
        let fresh = init_weights(
            &widths,
            model.config().init_scale,
            &mut stream(cfg.seed, PERTURB),
        );
        let mixed = shrink_perturb(&model.weights(), &fresh, cfg.shrink, cfg.perturb);
        model.set_weights(&mixed);
    }
    let run = Run {
        kind: RunKind::Warm,
        cfg,
        learning_rate: cfg.warm_learning_rate.unwrap_or(cfg.learning_rate),
        max_epochs: cfg.warm_epochs,
        control,
        started,
    };
    let mut epochs = Held::new(&pool, fixed, replay, &mut rng);
    run.fit(model, &mut epochs, &val)
}

/// θ ← shrink·θ + perturb·θ_fresh, value by value.
pub fn shrink_perturb(
    current: &[LayerWeights],
    fresh: &[LayerWeights],
    shrink: f64,
    perturb: f64,
) -> Vec<LayerWeights> {
    let mix = |a: &[f32], b: &[f32]| -> Vec<f32> {
        a.iter()
            .zip(b)
            .map(|(&a, &b)| (shrink * f64::from(a) + perturb * f64::from(b)) as f32)
            .collect()
    };
    current
        .iter()
        .zip(fresh)
        .map(|(c, f)| LayerWeights {
            inputs: c.inputs,
            outputs: c.outputs,
            weight: mix(&c.weight, &f.weight),
            bias: mix(&c.bias, &f.bias),
        })
        .collect()
}

pub(crate) fn no_rows(what: &'static str, task: Task) -> TrainError {
    let classes = match task {
        Task::Regression => "",
        Task::Classification => " of a class known when the model was first trained",
    };
    TrainError::NoRows { what, classes }
}

pub(crate) struct Run<'a> {
    pub(crate) kind: RunKind,
    pub(crate) cfg: &'a TrainingConfig,
    pub(crate) learning_rate: f64,
    pub(crate) max_epochs: usize,
    pub(crate) control: Control<'a>,
    pub(crate) started: Instant,
}

/// What an epoch hands each mini-batch to: inputs row-major and scaled
/// targets; `false` back ends the epoch (the run is out of time).
pub(crate) type Step<'a> = dyn FnMut(&[f32], &[f32]) -> Result<bool, TrainError> + 'a;

/// Where a run's epochs come from: rows held in memory ([`Held`]) or read
/// from the store block by block (`stream::Streamed`).
pub(crate) trait Epochs {
    /// Rows trained on per epoch and, of those, older rows replayed
    /// (known before the first epoch; the progress count and the summary).
    fn rows(&self) -> (usize, usize);

    /// Runs one epoch: hands each mini-batch, inputs row-major and scaled
    /// targets, to `step` in this epoch's order, until the rows run out or
    /// `step` answers `false`. Returns the rows handed over.
    fn epoch(&mut self, batch_size: usize, step: &mut Step<'_>) -> Result<usize, TrainError>;

    /// How the rows were streamed, for the summary (`None`: all in memory).
    fn streamed(&self) -> Option<crate::model::checkpoint::Streamed> {
        None
    }
}

/// Epochs over encoded rows in memory: the first `fixed` rows every epoch,
/// plus `replay` rows sampled afresh from the rest, shuffled together.
pub(crate) struct Held<'a> {
    data: &'a Data,
    fixed: usize,
    replay: usize,
    rng: &'a mut Rng,
    order: Vec<usize>,
    xb: Vec<f32>,
    yb: Vec<f32>,
}

impl<'a> Held<'a> {
    pub(crate) fn new(data: &'a Data, fixed: usize, replay: usize, rng: &'a mut Rng) -> Held<'a> {
        Held {
            data,
            fixed,
            replay,
            rng,
            order: Vec::with_capacity(fixed + replay),
            xb: Vec::new(),
            yb: Vec::new(),
        }
    }
}

impl Epochs for Held<'_> {
    fn rows(&self) -> (usize, usize) {
        (self.fixed, self.replay)
    }

    fn epoch(&mut self, batch_size: usize, step: &mut Step<'_>) -> Result<usize, TrainError> {
        let (data, fixed, replay) = (self.data, self.fixed, self.replay);
        let width = data.width;
        self.order.clear();
        self.order.extend(0..fixed);
        if replay > 0 {
            let mut rest: Vec<usize> = (fixed..data.n()).collect();
            // Partial Fisher–Yates: the first `replay` entries are a
            // uniform sample without replacement.
            for i in 0..replay {
                let j = i + self.rng.below(rest.len() - i);
                rest.swap(i, j);
            }
            self.order.extend_from_slice(&rest[..replay]);
        }
        self.rng.shuffle(&mut self.order);
        let mut handed = 0;
        for chunk in self.order.chunks(batch_size) {
            self.xb.clear();
            self.yb.clear();
            for &i in chunk {
                self.xb
                    .extend_from_slice(&data.x[i * width..(i + 1) * width]);
                self.yb.push(data.y[i]);
            }
            if !step(&self.xb, &self.yb)? {
                break;
            }
            handed += chunk.len();
        }
        Ok(handed)
    }
}

impl Run<'_> {
    /// The epoch loop: each epoch trains on what `epochs` hands over, in
    /// mini-batches, then scores the validation rows.
    pub(crate) fn fit(
        &self,
        mut model: Model,
        source: &mut dyn Epochs,
        val: &Data,
    ) -> Result<Trained, TrainError> {
        let cfg = self.cfg;
        let spec = model.spec().clone();
        let (task, k, width) = (spec.task, spec.outputs, spec.width());
        let unit = match task {
            Task::Regression => model.target_scale().std.powi(2),
            Task::Classification => 1.0,
        };
        let (l2, l1) = (model.config().l2, model.config().l1);
        let mut dropout_rng = (model.config().dropout > 0.0).then(|| stream(cfg.seed, DROPOUT));
        let train_device = device(cfg.backend).autodiff();
        let (fixed, replay) = source.rows();
        let per_epoch = fixed + replay;
        let batch_size = batch_size(cfg, per_epoch);
        let batches = per_epoch.div_ceil(batch_size);

        let mut train_loss = Vec::new();
        let mut validation_loss = Vec::new();
        let mut epoch_seconds = Vec::new();
        // A warm run starts from weights that already serve: they are the
        // first contender for the best epoch, so the run hands back the
        // parent unchanged rather than anything worse on the validation
        // rows (new and replayed older rows alike).
        let mut best: Option<(f64, usize, Vec<LayerWeights>)> = None;
        // With `weight_average_decay`, epochs are judged by the running
        // average of the weights, which starts at the run's first weights.
        let mut average = (cfg.weight_average_decay > 0.0)
            .then(|| WeightAverage::new(model.weights(), cfg.weight_average_decay));
        let mut start_validation_loss = None;
        if self.kind == RunKind::Warm && val.n() > 0 {
            let v = mean_loss(&model, val)? * unit;
            start_validation_loss = Some(v);
            best = Some((v, 0, model.weights()));
        }
        let mut stop = StopReason::EpochLimit;
        let mut yb = Vec::with_capacity(batch_size * k.max(1));
        let elapsed = |t: &Instant| t.elapsed().as_secs_f64();

        for epoch in 1..=self.max_epochs {
            let epoch_start = Instant::now();
            let mut loss_sum = 0.0;
            let mut b = 0;
            let mut out_of_time = false;
            let handed = source.epoch(batch_size, &mut |xs: &[f32], ys: &[f32]| {
                if self
                    .control
                    .cancel
                    .is_some_and(|c| c.load(Ordering::Relaxed))
                {
                    return Err(TrainError::Cancelled);
                }
                if elapsed(&self.started) >= cfg.max_seconds {
                    out_of_time = true;
                    return Ok(false);
                }
                let n = ys.len();
                yb.clear();
                match task {
                    Task::Regression => yb.extend_from_slice(ys),
                    Task::Classification => {
                        yb.resize(n * k, 0.0);
                        for (r, &c) in ys.iter().enumerate() {
                            yb[r * k + c as usize] = 1.0;
                        }
                    }
                }
                let x =
                    Tensor::<2>::from_data(TensorData::new(xs.to_vec(), [n, width]), &train_device);
                let y = Tensor::<2>::from_data(
                    TensorData::new(yb.clone(), [n, yb.len() / n]),
                    &train_device,
                );
                let (net, optimizer) = model.parts_mut();
                let out = net.forward(x, dropout_rng.as_mut());
                let data_loss = batch_loss(task, out, y);
                let value = f64::from(data_loss.clone().into_scalar::<f32>());
                if !value.is_finite() {
                    return Err(TrainError::Diverged { epoch, value });
                }
                loss_sum += value * n as f64;
                let loss = match net.penalty(l2, l1) {
                    Some(p) => data_loss.add(p),
                    None => data_loss,
                };
                let grads = GradientsParams::from_grads(loss.backward(), &*net);
                *net = optimizer.step(self.learning_rate, net.clone(), grads);
                if let Some(a) = average.as_mut() {
                    a.update(&net.weights());
                }
                b += 1;
                self.report(epoch, b, batches, None, None);
                Ok(true)
            })?;
            if out_of_time {
                stop = StopReason::TimeBudget;
                break;
            }
            epoch_seconds.push(epoch_start.elapsed().as_secs_f64());
            let tl = loss_sum / handed.max(1) as f64 * unit;
            train_loss.push(tl);
            let mut vl = None;
            if val.n() > 0 {
                let (v, judged) = match &average {
                    None => (mean_loss(&model, val)? * unit, None),
                    Some(a) => {
                        // The parameter ids are fixed, so Adam's state
                        // follows the weights that are swapped back.
                        let current = model.weights();
                        model.set_weights(&a.weights);
                        let v = mean_loss(&model, val)? * unit;
                        model.set_weights(&current);
                        (v, Some(&a.weights))
                    }
                };
                validation_loss.push(v);
                vl = Some(v);
                if best.as_ref().is_none_or(|(b, _, _)| v < *b) {
                    let w = judged.cloned().unwrap_or_else(|| model.weights());
                    best = Some((v, epoch, w));
                }
            }
            self.report(epoch, batches, batches, Some(tl), vl);
            if let Some((_, best_epoch, _)) = &best
                && cfg.patience > 0
                && epoch - best_epoch >= cfg.patience
            {
                stop = StopReason::EarlyStop;
                break;
            }
        }

        let epochs = train_loss.len();
        let mut kept_validation_loss = None;
        let best_epoch = match best {
            Some((v, e, w)) => {
                kept_validation_loss = Some(v);
                // Always restored: the model holds the last step's raw
                // weights, and after a time-budget stop a part-trained epoch
                // that was never validated.
                model.set_weights(&w);
                e
            }
            None => {
                if let Some(a) = &average {
                    model.set_weights(&a.weights);
                }
                epochs
            }
        };
        let summary = TrainingSummary {
            kind: self.kind,
            epochs,
            best_epoch,
            kept_validation_loss,
            start_validation_loss,
            rows: fixed,
            replay_rows: replay,
            validation_rows: val.n(),
            streamed: source.streamed(),
            seconds: elapsed(&self.started),
            epoch_seconds,
            train_loss,
            validation_loss,
            stop,
            learning_rate: self.learning_rate,
            config: cfg.clone(),
        };
        Ok(Trained { model, summary })
    }

    fn report(
        &self,
        epoch: usize,
        batch: usize,
        batches: usize,
        train_loss: Option<f64>,
        validation_loss: Option<f64>,
    ) {
        if let Some(f) = self.control.progress {
            f(Progress {
                kind: self.kind,
                epoch,
                max_epochs: self.max_epochs,
                batch,
                batches,
                train_loss,
                validation_loss,
                elapsed_seconds: self.started.elapsed().as_secs_f64(),
            });
        }
    }
}

/// An exponential average of network weights over optimizer steps. The
/// decay ramps up from 0.1 (`(1 + t) / (10 + t)` at step `t`) to its set
/// value, so the first weights of a run fade fast.
struct WeightAverage {
    weights: Vec<LayerWeights>,
    decay: f64,
    steps: u64,
}

impl WeightAverage {
    fn new(weights: Vec<LayerWeights>, decay: f64) -> WeightAverage {
        WeightAverage {
            weights,
            decay,
            steps: 0,
        }
    }

    fn update(&mut self, current: &[LayerWeights]) {
        let t = self.steps as f64;
        let d = self.decay.min((1.0 + t) / (10.0 + t)) as f32;
        self.steps += 1;
        for (a, l) in self.weights.iter_mut().zip(current) {
            for (x, y) in a.weight.iter_mut().zip(&l.weight) {
                *x = d * *x + (1.0 - d) * y;
            }
            for (x, y) in a.bias.iter_mut().zip(&l.bias) {
                *x = d * *x + (1.0 - d) * y;
            }
        }
    }
}

/// Mini-batch size of a run with `per_epoch` rows an epoch: `batch_size`,
/// unless that leaves an epoch fewer than `min_batches_per_epoch` steps; then
/// smaller, but never under 16 rows (or `batch_size`, when smaller). On a
/// thousand rows, batches of 256 gave 4 Adam steps an epoch, and early
/// stopping with patience counted in epochs stopped on a noisy validation
/// split before the network had moved far from its start. Runs of 4,096
/// rows an epoch or more (16 batches of 256) keep `batch_size`.
fn batch_size(cfg: &TrainingConfig, per_epoch: usize) -> usize {
    let largest = cfg.batch_size.max(1);
    let floor = largest.min(16);
    per_epoch
        .div_ceil(cfg.min_batches_per_epoch.max(1))
        .clamp(floor, largest)
}

/// Mean data loss of a batch: MSE (regression, `y` is `n × 1`) or
/// cross-entropy against one-hot `y` (classification).
pub(crate) fn batch_loss(task: Task, out: Tensor<2>, y: Tensor<2>) -> Tensor<1> {
    match task {
        Task::Regression => out.sub(y).square().mean(),
        Task::Classification => {
            let [n, _] = out.dims();
            log_softmax(out, 1).mul(y).sum().mul_scalar(-1.0 / n as f64)
        }
    }
}

/// Mean loss of `model` on `data` in training units (scaled targets).
fn mean_loss(model: &Model, data: &Data) -> Result<f64, ModelError> {
    let raw = model.raw_outputs(&data.x, model.backend())?;
    let spec = model.spec();
    let losses = crate::model::row_losses_from_raw(
        spec.task,
        spec.outputs,
        TargetScale::IDENTITY,
        &raw,
        &data.y,
    );
    Ok(losses.iter().sum::<f64>() / losses.len().max(1) as f64)
}

/// Ordinary least squares with an intercept on a row-major feature matrix,
/// solved in f64 through the normal equations with a Cholesky factor (with
/// a tiny ridge `lambda` on the slopes when given). Returns
/// `[intercept, slope_1, …]` in the features' units, or `None` when the
/// system is singular. A closed-form reference for linear models.
pub fn least_squares(x: &[f64], y: &[f64], width: usize, lambda: f64) -> Option<Vec<f64>> {
    let n = y.len();
    if width == 0 || x.len() != n * width || n == 0 {
        return None;
    }
    // Centre the columns: the intercept then separates, and the system is
    // better conditioned.
    let mean_x: Vec<f64> = (0..width)
        .map(|j| (0..n).map(|i| x[i * width + j]).sum::<f64>() / n as f64)
        .collect();
    let mean_y = y.iter().sum::<f64>() / n as f64;
    let mut a = vec![0.0; width * width];
    let mut b = vec![0.0; width];
    for i in 0..n {
        let yi = y[i] - mean_y;
        for j in 0..width {
            let xj = x[i * width + j] - mean_x[j];
            b[j] += xj * yi;
            for l in 0..=j {
                a[j * width + l] += xj * (x[i * width + l] - mean_x[l]);
            }
        }
    }
    for j in 0..width {
        a[j * width + j] += lambda;
        for l in 0..j {
            a[l * width + j] = a[j * width + l];
        }
    }
    let beta = crate::baseline::solve_spd(&a, &b, width, 1)?;
    let intercept = mean_y - beta.iter().zip(&mean_x).map(|(b, m)| b * m).sum::<f64>();
    let mut out = vec![intercept];
    out.extend(beta);
    Some(out)
}

pub mod stream;

#[cfg(test)]
mod tests;
