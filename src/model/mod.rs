//! The network a model version is made of: a burn `Module` of dense layers
//! over the encoded features, its Adam state, the frozen feature encoding and
//! target scale, batch prediction, and the per-row losses the gate compares.
//! `checkpoint` owns the files of a model version on disk.
//!
//! Only this module and `train` import burn. The backend is a value chosen at
//! run time (`config::Backend`), so one `Model` type serves both. Parameters
//! get fixed ids (layer by layer), so the optimizer state, which burn keys by
//! parameter id, finds its weights again after a checkpoint is reloaded in
//! another process. Weights are initialised from the project's own seeded
//! `Rng`, never from burn's random source, so two models can be built and
//! trained on two threads without sharing any global state.

pub mod activation;
pub mod checkpoint;
pub mod direct;

use burn::module::{Module, Param, ParamGroup, ParamId};
use burn::nn::Linear;
use burn::optim::{AdamConfig, ModuleOptimizer};
use burn::tensor::{Device, Tensor, TensorData};
use serde::{Deserialize, Serialize};

use crate::config::{Activation, Backend, ModelConfig, Task};
use crate::rng::Rng;
use crate::schema::{FeatureSpec, RowMatrix};

pub use checkpoint::{Checkpoint, CheckpointMeta, Manifest, RunKind, StopReason, TrainingSummary};

/// Rows sent through the network at once when predicting.
pub const PREDICT_CHUNK: usize = 4096;

/// Largest loss charged for a class the model gives (numerically) zero
/// probability, or a class code it has no output for: −ln(1e-12).
pub const MAX_ROW_LOG_LOSS: f64 = 27.631_021_115_928_547;

/// The device of a backend (without autodiff).
pub fn device(backend: Backend) -> Device {
    match backend {
        Backend::Flex => Device::flex(),
        Backend::Ndarray => ndarray_device(),
    }
}

// burn marks its ndarray backend deprecated; it is still the faster one for
// large-batch prediction here, so it stays selectable.
#[allow(deprecated)]
fn ndarray_device() -> Device {
    Device::ndarray()
}

/// Failures of the model module; messages name the file and what to do.
#[derive(Debug, thiserror::Error)]
pub enum ModelError {
    #[error("cannot {action} {path}: {source}")]
    Io {
        action: &'static str,
        path: std::path::PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("no checkpoint at {path}: {what}; list model versions with `tidegate models`")]
    Missing {
        path: std::path::PathBuf,
        what: String,
    },
    #[error("checkpoint {path} already exists; model ids are never reused, so pick the next id")]
    Exists { path: std::path::PathBuf },
    #[error(
        "manifest {path} is not valid: {message}; the checkpoint is damaged or from another tool version, run `tidegate verify`"
    )]
    Manifest {
        path: std::path::PathBuf,
        message: String,
    },
    #[error(
        "file {path} does not match the hash in its manifest (expected {expected}, found {found}); the checkpoint was changed or damaged, restore it from a backup or train a new model"
    )]
    Hash {
        path: std::path::PathBuf,
        expected: String,
        found: String,
    },
    #[error(
        "checkpoint {path} was trained for schema {found}, but the config's schema is {expected}; a changed schema needs `tidegate migrate` and a cold model"
    )]
    Schema {
        path: std::path::PathBuf,
        expected: String,
        found: String,
    },
    #[error(
        "weights or optimizer state in {path} cannot be read: {message}; restore the checkpoint from a backup or train a new model"
    )]
    Record {
        path: std::path::PathBuf,
        message: String,
    },
    #[error("feature matrix has {len} values, not a multiple of the model's input width {width}")]
    FeatureWidth { len: usize, width: usize },
    #[error("could not change the first layer for new inputs or scales: {0}")]
    FirstLayer(String),
    #[error("row {row} has no target value; per-row losses need the target column")]
    MissingTarget { row: usize },
    #[error(
        "model has an input width of 0 or no outputs (width {width}, outputs {outputs}); a classification target needs at least one known class"
    )]
    Shape { width: usize, outputs: usize },
}

/// How regression targets were standardised for training; predictions are
/// mapped back with `mean + std·output`. Identity for classification.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TargetScale {
    pub mean: f64,
    pub std: f64,
}

impl TargetScale {
    pub const IDENTITY: TargetScale = TargetScale {
        mean: 0.0,
        std: 1.0,
    };

    /// Mean and sample standard deviation of `values` (NaN ignored); a
    /// constant target keeps std 1.
    pub fn of(values: &[f32]) -> TargetScale {
        let mut st = crate::schema::RunningStats::default();
        for v in values.iter().filter(|v| !v.is_nan()) {
            st.push(f64::from(*v));
        }
        let sd = st.std_dev();
        TargetScale {
            mean: st.mean,
            std: if sd > 1e-12 { sd } else { 1.0 },
        }
    }
}

/// One dense layer's values, row-major `inputs × outputs`.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerWeights {
    pub inputs: usize,
    pub outputs: usize,
    pub weight: Vec<f32>,
    pub bias: Vec<f32>,
}

/// Runs `score(net, device, lo, hi)` over `n` rows: one stretch of whole
/// chunks per core for large inputs, in order, results joined.
fn by_stretches<F>(n: usize, net: &Net, dev: &Device, score: F) -> Vec<f32>
where
    F: Fn(&Net, &Device, usize, usize) -> Vec<f32> + Sync,
{
    let threads = std::thread::available_parallelism()
        .map_or(1, |t| t.get())
        .min(n / PREDICT_CHUNK)
        .clamp(1, 8);
    if threads == 1 {
        return score(net, dev, 0, n);
    }
    let per = n.div_ceil(threads).div_ceil(PREDICT_CHUNK) * PREDICT_CHUNK;
    let score = &score;
    let parts: Vec<Vec<f32>> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..threads)
            .map(|t| {
                let lo = (t * per).min(n);
                let hi = ((t + 1) * per).min(n);
                let net = net.clone();
                let dev = dev.clone();
                scope.spawn(move || score(&net, &dev, lo, hi))
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("a scoring thread panicked"))
            .collect()
    });
    parts.concat()
}

/// Network outputs for encoded rows, `PREDICT_CHUNK` rows at a time.
fn forward_in_chunks(
    net: &Net,
    features: &[f32],
    width: usize,
    outputs: usize,
    dev: &Device,
) -> Vec<f32> {
    let n = features.len() / width;
    let mut out = Vec::with_capacity(n * outputs);
    let mut start = 0;
    while start < n {
        let rows = PREDICT_CHUNK.min(n - start);
        let x = Tensor::<2>::from_data(
            TensorData::new(
                features[start * width..(start + rows) * width].to_vec(),
                [rows, width],
            ),
            dev,
        );
        out.extend(tensor_values(net.forward(x, None).into_data()));
        start += rows;
    }
    out
}

/// The burn module: dense layers with an activation between them.
#[derive(Module, Debug)]
pub struct Net {
    layers: Vec<Linear>,
    #[module(skip)]
    activation: Activation,
    #[module(skip)]
    dropout: f64,
}

impl Net {
    /// Builds the network on `device` from explicit weights, with fixed
    /// parameter ids; parameters track gradients on an autodiff device.
    pub fn from_weights(
        weights: &[LayerWeights],
        activation: Activation,
        dropout: f64,
        device: &Device,
    ) -> Net {
        let grad = device.is_autodiff();
        let layers = weights
            .iter()
            .enumerate()
            .map(|(i, lw)| {
                let w = Tensor::<2>::from_data(
                    TensorData::new(lw.weight.clone(), [lw.inputs, lw.outputs]),
                    device,
                );
                let b =
                    Tensor::<1>::from_data(TensorData::new(lw.bias.clone(), [lw.outputs]), device);
                let (w, b) = if grad {
                    (w.require_grad(), b.require_grad())
                } else {
                    (w, b)
                };
                let id = 2 * i as u64;
                Linear {
                    weight: Param::initialized(ParamId::from(id + 1), w),
                    bias: Some(Param::initialized(ParamId::from(id + 2), b)),
                }
            })
            .collect();
        Net {
            layers,
            activation,
            dropout,
        }
    }

    /// Current weight values, layer by layer.
    pub fn weights(&self) -> Vec<LayerWeights> {
        self.layers
            .iter()
            .map(|l| {
                let w = l.weight.val();
                let [inputs, outputs] = w.dims();
                LayerWeights {
                    inputs,
                    outputs,
                    weight: tensor_values(w.into_data()),
                    bias: l.bias.as_ref().map_or_else(
                        || vec![0.0; outputs],
                        |b| tensor_values(b.val().into_data()),
                    ),
                }
            })
            .collect()
    }

    /// Forward pass. With `dropout_rng`, hidden activations are dropped with
    /// the configured probability (inverted dropout, so inference needs no
    /// rescaling).
    pub fn forward(&self, x: Tensor<2>, mut dropout_rng: Option<&mut Rng>) -> Tensor<2> {
        let last = self.layers.len() - 1;
        let mut h = x;
        for (i, layer) in self.layers.iter().enumerate() {
            h = layer.forward(h);
            if i < last {
                h = activation::apply(self.activation, h);
                if let Some(rng) = dropout_rng.as_deref_mut()
                    && self.dropout > 0.0
                {
                    h = apply_dropout(h, self.dropout, rng);
                }
            }
        }
        h
    }

    /// Sum of squared and of absolute weight values (biases excluded), as
    /// tensors, for the L2 and L1 penalties.
    pub fn penalty(&self, l2: f64, l1: f64) -> Option<Tensor<1>> {
        let mut total: Option<Tensor<1>> = None;
        for layer in &self.layers {
            let w = layer.weight.val();
            let mut term: Option<Tensor<1>> = None;
            if l2 > 0.0 {
                term = Some(w.clone().square().sum().mul_scalar(l2));
            }
            if l1 > 0.0 {
                let t = w.abs().sum().mul_scalar(l1);
                term = Some(match term {
                    Some(a) => a.add(t),
                    None => t,
                });
            }
            if let Some(t) = term {
                total = Some(match total {
                    Some(a) => a.add(t),
                    None => t,
                });
            }
        }
        total
    }
}

fn apply_dropout(h: Tensor<2>, p: f64, rng: &mut Rng) -> Tensor<2> {
    let [n, w] = h.dims();
    let keep = 1.0 - p;
    let scale = (1.0 / keep) as f32;
    let mask: Vec<f32> = (0..n * w)
        .map(|_| if rng.uniform() < keep { scale } else { 0.0 })
        .collect();
    let device = h.device().inner();
    let mask = Tensor::<2>::from_data(TensorData::new(mask, [n, w]), &device);
    h.mul(mask)
}

fn tensor_values(data: TensorData) -> Vec<f32> {
    data.convert::<f32>()
        .try_into_vec::<f32>()
        .unwrap_or_default()
}

/// Fresh weights: uniform in ±scale·sqrt(1/fan_in) for weights (the usual
/// fan-in scaling, times `init_scale`), zero biases.
pub fn init_weights(widths: &[usize], init_scale: f64, rng: &mut Rng) -> Vec<LayerWeights> {
    widths
        .windows(2)
        .map(|w| {
            let (inputs, outputs) = (w[0], w[1]);
            let bound = init_scale * (1.0 / inputs.max(1) as f64).sqrt();
            let weight = (0..inputs * outputs)
                .map(|_| ((rng.uniform() * 2.0 - 1.0) * bound) as f32)
                .collect();
            LayerWeights {
                inputs,
                outputs,
                weight,
                bias: vec![0.0; outputs],
            }
        })
        .collect()
}

/// Layer widths from input to output.
pub fn layer_widths(spec: &FeatureSpec, config: &ModelConfig) -> Vec<usize> {
    let mut widths = vec![spec.width()];
    widths.extend(&config.hidden);
    widths.push(spec.outputs);
    widths
}

/// What a batch of rows is predicted to be.
#[derive(Debug, Clone, PartialEq)]
pub enum Predictions {
    /// One value per row, in the target's units.
    Regression { values: Vec<f32> },
    /// Arg-max class code per row and softmax probabilities, row-major
    /// `rows × classes`.
    Classification {
        classes: Vec<u32>,
        probabilities: Vec<f32>,
        n_classes: usize,
    },
}

impl Predictions {
    pub fn len(&self) -> usize {
        match self {
            Predictions::Regression { values } => values.len(),
            Predictions::Classification { classes, .. } => classes.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// A model version in memory: network, Adam state, and the encoding that
/// turns stored rows into its inputs.
#[derive(Clone)]
pub struct Model {
    net: Net,
    optimizer: ModuleOptimizer,
    config: ModelConfig,
    spec: FeatureSpec,
    target: TargetScale,
    backend: Backend,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model")
            .field("config", &self.config)
            .field("widths", &layer_widths(&self.spec, &self.config))
            .field("target", &self.target)
            .field("backend", &self.backend)
            .finish_non_exhaustive()
    }
}

/// The optimizer every model trains with.
pub fn adam() -> ModuleOptimizer {
    AdamConfig::new().init()
}

impl Model {
    /// A freshly initialised model (weights from `seed`, empty Adam state).
    pub fn new(
        spec: FeatureSpec,
        config: &ModelConfig,
        target: TargetScale,
        backend: Backend,
        seed: u64,
    ) -> Result<Model, ModelError> {
        let widths = layer_widths(&spec, config);
        if spec.width() == 0 || spec.outputs == 0 {
            return Err(ModelError::Shape {
                width: spec.width(),
                outputs: spec.outputs,
            });
        }
        let weights = init_weights(&widths, config.init_scale, &mut Rng::new(seed));
        Ok(Model::from_parts(
            spec,
            config.clone(),
            target,
            backend,
            &weights,
            adam(),
        ))
    }

    pub(crate) fn from_parts(
        spec: FeatureSpec,
        config: ModelConfig,
        target: TargetScale,
        backend: Backend,
        weights: &[LayerWeights],
        optimizer: ModuleOptimizer,
    ) -> Model {
        let device = device(backend).autodiff();
        let net = Net::from_weights(weights, config.activation, config.dropout, &device);
        Model {
            net,
            optimizer,
            config,
            spec,
            target,
            backend,
        }
    }

    pub fn spec(&self) -> &FeatureSpec {
        &self.spec
    }

    pub fn config(&self) -> &ModelConfig {
        &self.config
    }

    pub fn target_scale(&self) -> TargetScale {
        self.target
    }

    /// Backend the model trains on.
    pub fn backend(&self) -> Backend {
        self.backend
    }

    pub fn weights(&self) -> Vec<LayerWeights> {
        self.net.weights()
    }

    /// blake3 of every weight and bias value (little-endian f32 bits, layer
    /// by layer): equal digests mean bit-identical networks. Checkpoint file
    /// bytes are not stable across processes, these values are.
    pub fn weights_digest(&self) -> String {
        let mut h = blake3::Hasher::new();
        for lw in self.weights() {
            h.update(&(lw.inputs as u64).to_le_bytes());
            h.update(&(lw.outputs as u64).to_le_bytes());
            for v in lw.weight.iter().chain(&lw.bias) {
                h.update(&v.to_le_bytes());
            }
        }
        h.finalize().to_hex().to_string()
    }

    pub(crate) fn net(&self) -> &Net {
        &self.net
    }

    pub(crate) fn parts_mut(&mut self) -> (&mut Net, &mut ModuleOptimizer) {
        (&mut self.net, &mut self.optimizer)
    }

    pub(crate) fn optimizer(&self) -> &ModuleOptimizer {
        &self.optimizer
    }

    /// Replaces the weights (same parameter ids), keeping the Adam state.
    pub(crate) fn set_weights(&mut self, weights: &[LayerWeights]) {
        let device = device(self.backend).autodiff();
        self.net = Net::from_weights(
            weights,
            self.config.activation,
            self.config.dropout,
            &device,
        );
    }

    /// Moves the model to another training backend (Adam state follows on
    /// the next step).
    pub(crate) fn set_backend(&mut self, backend: Backend) {
        if backend != self.backend {
            let w = self.weights();
            self.backend = backend;
            self.set_weights(&w);
        }
    }

    /// Forgets the Adam state (the next step starts a fresh optimizer).
    pub fn reset_optimizer(&mut self) {
        self.optimizer = adam();
    }

    /// The network's raw outputs (scaled regression value or class logits)
    /// for a row-major feature matrix, computed on `backend` in chunks.
    pub fn raw_outputs(&self, features: &[f32], backend: Backend) -> Result<Vec<f32>, ModelError> {
        let width = self.spec.width();
        if width == 0 || !features.len().is_multiple_of(width) {
            return Err(ModelError::FeatureWidth {
                len: features.len(),
                width,
            });
        }
        let n = features.len() / width;
        let k = self.spec.outputs;
        let net = self.scoring_net(backend);
        let dev = device(backend);
        Ok(by_stretches(n, &net, &dev, |net, dev, lo, hi| {
            forward_in_chunks(net, &features[lo * width..hi * width], width, k, dev)
        }))
    }

    /// The network for inference on `backend` (a copy when it is not the
    /// one the model was built on).
    fn scoring_net(&self, backend: Backend) -> Net {
        if backend == self.backend {
            self.net.valid()
        } else {
            Net::from_weights(
                &self.weights(),
                self.config.activation,
                0.0,
                &device(backend),
            )
        }
    }

    /// Raw outputs for stored rows, encoded a chunk at a time on each
    /// thread (no feature matrix for all rows at once).
    fn raw_outputs_of_rows(
        &self,
        rows: &RowMatrix,
        backend: Backend,
    ) -> Result<Vec<f32>, ModelError> {
        let width = self.spec.width();
        if width == 0 {
            return Err(ModelError::FeatureWidth { len: 0, width });
        }
        let k = self.spec.outputs;
        let net = self.scoring_net(backend);
        let dev = device(backend);
        let cols = rows.width();
        let cells = rows.cells();
        Ok(by_stretches(
            rows.n_rows(),
            &net,
            &dev,
            |net, dev, lo, hi| {
                let mut out = Vec::with_capacity((hi - lo) * k);
                let mut start = lo;
                while start < hi {
                    let end = (start + PREDICT_CHUNK).min(hi);
                    let chunk =
                        RowMatrix::from_cells(cols, cells[start * cols..end * cols].to_vec());
                    let features = self.spec.encode_inputs(&chunk);
                    out.extend(forward_in_chunks(net, &features, width, k, dev));
                    start = end;
                }
                out
            },
        ))
    }

    /// This network's layers as plain matrices, for `predict_direct`.
    pub fn direct(&self) -> direct::DirectNet {
        direct::DirectNet::new(self.weights(), self.config.activation)
    }

    /// Predictions for a few rows through `net` (this model's `direct()`)
    /// instead of burn: the same values up to f32 rounding, without burn's
    /// set-up cost per call. For the prediction endpoint's small requests.
    pub fn predict_direct(
        &self,
        net: &direct::DirectNet,
        rows: &RowMatrix,
    ) -> Result<Predictions, ModelError> {
        let width = self.spec.width();
        if width == 0 || net.width() != width {
            return Err(ModelError::FeatureWidth {
                len: net.width(),
                width,
            });
        }
        let features = self.spec.encode_inputs(rows);
        let mut raw = Vec::with_capacity(rows.n_rows() * self.spec.outputs);
        net.forward(&features, &mut raw);
        Ok(self.to_predictions(raw))
    }

    /// Predictions for an already encoded feature matrix.
    pub fn predict_features(
        &self,
        features: &[f32],
        backend: Backend,
    ) -> Result<Predictions, ModelError> {
        let raw = self.raw_outputs(features, backend)?;
        Ok(self.to_predictions(raw))
    }

    /// Predictions for stored rows (the target column is ignored).
    /// A copy whose first layer also takes the category values added to
    /// `vocabs` since this model's encoding was fixed: each new one-hot
    /// input gets zero weights, so every prediction (old rows, and new
    /// values, which were scored as "none of the known values") is exactly
    /// unchanged, and the next warm cycle can learn the new values. Adam's
    /// state of the first layer is reset (its moments have the old shape).
    /// Returns the copy and how many inputs each column gained; the copy is
    /// a plain clone when nothing was added.
    ///
    /// Not covered: a new class of a classification target (the output
    /// layer keeps its classes; a cold candidate learns the new one).
    pub fn widened(
        &self,
        vocabs: &crate::schema::Vocabularies,
    ) -> Result<(Model, std::collections::BTreeMap<usize, usize>), ModelError> {
        use crate::schema::InputEncoding;
        let mut added = std::collections::BTreeMap::new();
        let mut inserts = Vec::new();
        let mut spec = self.spec.clone();
        let mut at = 0;
        for enc in &mut spec.inputs {
            match enc {
                InputEncoding::Number { .. } => at += 1,
                InputEncoding::OneHot { column, width } => {
                    let now = vocabs.get(column).map_or(0, |v| v.len());
                    if now > *width {
                        inserts.push((at + *width, now - *width));
                        added.insert(*column, now - *width);
                        *width = now;
                    }
                    at += *width;
                }
            }
        }
        if inserts.is_empty() {
            return Ok((self.clone(), added));
        }
        let mut weights = self.net.weights();
        let first = &mut weights[0];
        // Positions are in the widened layout; inserting from left to right
        // makes the matrix match that layout up to each next position.
        for &(pos, count) in &inserts {
            first.weight =
                crate::refold::widen_inputs(&first.weight, first.inputs, first.outputs, pos, count)
                    .map_err(|e| ModelError::FirstLayer(e.to_string()))?;
            first.inputs += count;
        }
        Ok((self.with_first_layer(spec, &weights), added))
    }

    /// A copy whose standardisation of number inputs follows `stats` where
    /// they moved past `threshold` (see `refold::should_refresh`), with the
    /// change folded into the first layer so every row without missing
    /// values gets the same prediction (to float rounding). A missing value
    /// encodes as the mean, so for such rows it now means the new mean.
    /// Returns the copy and the schema columns refreshed.
    pub fn rescaled(
        &self,
        stats: &crate::schema::ColumnStats,
        threshold: f64,
    ) -> Result<(Model, Vec<usize>), ModelError> {
        use crate::refold::{ScaleChange, refold_scalers, should_refresh};
        use crate::schema::InputEncoding;
        let mut spec = self.spec.clone();
        let mut changes = Vec::new();
        let mut columns = Vec::new();
        let mut at = 0;
        for enc in &mut spec.inputs {
            match enc {
                InputEncoding::Number { column, mean, std } => {
                    if let Some(st) = stats.numbers.get(column).filter(|s| s.count >= 2) {
                        let sd = st.std_dev();
                        let new = (st.mean as f32, if sd > 1e-12 { sd as f32 } else { 1.0 });
                        if threshold > 0.0 && should_refresh((*mean, *std), new, threshold as f32) {
                            changes.push(ScaleChange {
                                col: at,
                                old: (*mean, *std),
                                new,
                            });
                            columns.push(*column);
                            (*mean, *std) = new;
                        }
                    }
                    at += 1;
                }
                InputEncoding::OneHot { width, .. } => at += *width,
            }
        }
        if changes.is_empty() {
            return Ok((self.clone(), columns));
        }
        let mut weights = self.net.weights();
        let first = &mut weights[0];
        refold_scalers(
            &mut first.weight,
            &mut first.bias,
            first.inputs,
            first.outputs,
            &changes,
        )
        .map_err(|e| ModelError::FirstLayer(e.to_string()))?;
        Ok((self.with_first_layer(spec, &weights), columns))
    }

    /// The same model with a new encoding and first layer; Adam's state of
    /// the first layer is reset (its moments belong to the old inputs).
    fn with_first_layer(&self, spec: FeatureSpec, weights: &[LayerWeights]) -> Model {
        let reset = ParamGroup::ids_from_module(self.net.layers[0].clone());
        let optimizer = self
            .optimizer
            .clone()
            .with_group(reset, AdamConfig::new().build(), None);
        Model::from_parts(
            spec,
            self.config.clone(),
            self.target,
            self.backend,
            weights,
            optimizer,
        )
    }

    pub fn predict(&self, rows: &RowMatrix, backend: Backend) -> Result<Predictions, ModelError> {
        Ok(self.to_predictions(self.raw_outputs_of_rows(rows, backend)?))
    }

    fn to_predictions(&self, raw: Vec<f32>) -> Predictions {
        match self.spec.task {
            Task::Regression => Predictions::Regression {
                values: raw
                    .iter()
                    .map(|&o| (self.target.mean + self.target.std * f64::from(o)) as f32)
                    .collect(),
            },
            Task::Classification => {
                let k = self.spec.outputs;
                let mut classes = Vec::with_capacity(raw.len() / k);
                let mut probabilities = Vec::with_capacity(raw.len());
                for logits in raw.chunks_exact(k) {
                    let p = softmax(logits);
                    classes.push(arg_max(&p));
                    probabilities.extend(p.iter().map(|&v| v as f32));
                }
                Predictions::Classification {
                    classes,
                    probabilities,
                    n_classes: k,
                }
            }
        }
    }

    /// Regression: target − prediction of every row, in the target's units,
    /// from the same pass `row_losses` makes (each loss is the square);
    /// `None` for classification.
    pub fn row_errors(
        &self,
        rows: &RowMatrix,
        backend: Backend,
    ) -> Result<Option<Vec<f64>>, ModelError> {
        if self.spec.task != Task::Regression {
            return Ok(None);
        }
        let targets = self.spec.encode_targets(rows);
        if let Some(row) = targets.iter().position(|t| t.is_nan()) {
            return Err(ModelError::MissingTarget { row });
        }
        let raw = self.raw_outputs_of_rows(rows, backend)?;
        Ok(Some(
            raw.iter()
                .zip(&targets)
                .map(|(&o, &y)| regression_error(self.target, o, y))
                .collect(),
        ))
    }

    /// Loss of every row: squared error in the target's units for
    /// regression, cross-entropy −ln p(true class) for classification (at
    /// most `MAX_ROW_LOG_LOSS`, also for a class the model has no output
    /// for). The gate compares these row by row between two models.
    pub fn row_losses(&self, rows: &RowMatrix, backend: Backend) -> Result<Vec<f64>, ModelError> {
        let targets = self.spec.encode_targets(rows);
        if let Some(row) = targets.iter().position(|t| t.is_nan()) {
            return Err(ModelError::MissingTarget { row });
        }
        let raw = self.raw_outputs_of_rows(rows, backend)?;
        Ok(row_losses_from_raw(
            self.spec.task,
            self.spec.outputs,
            self.target,
            &raw,
            &targets,
        ))
    }
}

/// Target − prediction of one row, in the target's units (its square is
/// the row's squared-error loss).
fn regression_error(target: TargetScale, raw: f32, y: f32) -> f64 {
    f64::from(y) - (target.mean + target.std * f64::from(raw))
}

/// Per-row losses from raw network outputs (see `Model::row_losses`).
pub(crate) fn row_losses_from_raw(
    task: Task,
    k: usize,
    target: TargetScale,
    raw: &[f32],
    targets: &[f32],
) -> Vec<f64> {
    match task {
        Task::Regression => raw
            .iter()
            .zip(targets)
            .map(|(&o, &y)| regression_error(target, o, y).powi(2))
            .collect(),
        Task::Classification => raw
            .chunks_exact(k)
            .zip(targets)
            .map(|(logits, &y)| {
                let class = y as usize;
                if class >= k {
                    return MAX_ROW_LOG_LOSS;
                }
                (-log_softmax_at(logits, class)).min(MAX_ROW_LOG_LOSS)
            })
            .collect(),
    }
}

/// Softmax in f64 (shifted by the largest logit for stability).
pub fn softmax(logits: &[f32]) -> Vec<f64> {
    let m = logits
        .iter()
        .fold(f64::NEG_INFINITY, |a, &b| a.max(f64::from(b)));
    let e: Vec<f64> = logits.iter().map(|&v| (f64::from(v) - m).exp()).collect();
    let s: f64 = e.iter().sum();
    e.into_iter().map(|v| v / s).collect()
}

fn log_softmax_at(logits: &[f32], class: usize) -> f64 {
    let m = logits
        .iter()
        .fold(f64::NEG_INFINITY, |a, &b| a.max(f64::from(b)));
    let s: f64 = logits.iter().map(|&v| (f64::from(v) - m).exp()).sum();
    f64::from(logits[class]) - m - s.ln()
}

/// Index of the largest value (the first one on ties).
pub fn arg_max(values: &[f64]) -> u32 {
    let mut best = 0;
    for (i, v) in values.iter().enumerate() {
        if *v > values[best] {
            best = i;
        }
    }
    best as u32
}

/// A feature spec of `inputs` standardised-as-is number columns, for tests.
#[cfg(test)]
pub(crate) fn test_spec(inputs: usize, task: Task, outputs: usize) -> FeatureSpec {
    FeatureSpec {
        inputs: (0..inputs)
            .map(|c| crate::schema::InputEncoding::Number {
                column: c,
                mean: 0.0,
                std: 1.0,
            })
            .collect(),
        target: inputs,
        task,
        outputs,
    }
}

#[cfg(test)]
mod tests;
