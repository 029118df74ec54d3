//! The files of one model version, `state/models/<id>/`: `weights.bpk` and
//! `optimizer.bpk` (burn's burnpack records) and `manifest.json`, which says
//! where the model came from and holds the blake3 of both record files.
//!
//! A checkpoint is written into a temp folder beside its final place, every
//! file and the folder are fsynced, the folder is renamed into place and the
//! parent fsynced: a reader (or a crash) sees the whole version or nothing.
//! Loading checks the file hashes and the schema fingerprint before any
//! weight is used.

use std::collections::BTreeMap;
use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use burn::module::Module;
use burn::optim::ModuleOptimizer;
use burn::store::ModuleRecord;
use burn::tensor::Bytes;
use chrono::{DateTime, SecondsFormat, Utc};
use serde::{Deserialize, Serialize};

use super::{LayerWeights, Model, ModelError, Net, TargetScale, adam, device, layer_widths};
use crate::config::{Backend, ModelConfig, TrainingConfig};
use crate::fsutil::{TEMP_PREFIX, sync_dir};
use crate::ids::ModelId;
use crate::schema::{FeatureSpec, Vocab, Vocabularies};

/// Version of the manifest layout.
pub const MANIFEST_FORMAT: u32 = 1;
pub const MANIFEST_FILE: &str = "manifest.json";
pub const WEIGHTS_FILE: &str = "weights.bpk";
pub const OPTIMIZER_FILE: &str = "optimizer.bpk";

/// How a model version was trained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum RunKind {
    Cold,
    Warm,
}

/// Why a training run ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum StopReason {
    /// All allowed epochs ran.
    EpochLimit,
    /// Validation loss stopped improving for `patience` epochs.
    EarlyStop,
    /// `max_seconds` ran out.
    TimeBudget,
}

/// What a training run did; kept in the manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainingSummary {
    pub kind: RunKind,
    /// Epochs run.
    pub epochs: usize,
    /// Epoch (1-based) whose weights were kept; 0 when no epoch finished,
    /// or, in a warm run, when no epoch beat the parent's own weights on
    /// the validation rows (the parent's weights are then kept).
    pub best_epoch: usize,
    /// Validation loss of the weights kept (the best epoch's or, in a warm
    /// run, the parent's); `None` without a validation split and in
    /// manifests written before it was recorded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub kept_validation_loss: Option<f64>,
    /// Warm runs: the parent's validation loss before any step, the mark
    /// every epoch had to beat. `None` for cold runs, without a validation
    /// split, and in manifests written before it was recorded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub start_validation_loss: Option<f64>,
    /// New rows trained on (after the validation split).
    pub rows: usize,
    /// Older rows replayed per epoch (warm runs).
    pub replay_rows: usize,
    /// Rows held aside for early stopping.
    pub validation_rows: usize,
    /// A cold run that read its rows from the store block by block, epoch
    /// after epoch, because they did not fit the cycle's memory budget.
    /// `None` when every row was held in memory (and in manifests written
    /// before streaming existed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub streamed: Option<Streamed>,
    pub seconds: f64,
    /// Seconds of each epoch (training steps only).
    pub epoch_seconds: Vec<f64>,
    /// Mean data loss per epoch over the mini-batches (target units: MSE
    /// for regression, cross-entropy for classification).
    pub train_loss: Vec<f64>,
    /// Validation loss per epoch, same units; empty without a validation split.
    pub validation_loss: Vec<f64>,
    pub stop: StopReason,
    pub learning_rate: f64,
    pub config: TrainingConfig,
}

/// How a streamed cold run read its rows (see `train::stream`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Streamed {
    /// The cycle's memory budget in MiB (`[memory] cycle_mb`).
    pub budget_mb: u64,
    /// Blocks of contiguous stored rows the training rows were cut into.
    pub blocks: usize,
    /// Rows in one block (the last block of a batch may hold fewer).
    pub block_rows: usize,
    /// Blocks whose rows were shuffled together in one window.
    pub window_blocks: usize,
}

/// Everything about a model version except its tensors.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    pub format: u32,
    pub id: ModelId,
    pub parent: Option<ModelId>,
    /// UTC, RFC 3339.
    pub created_at: String,
    pub kind: RunKind,
    pub model: ModelConfig,
    pub training: TrainingConfig,
    pub schema_fingerprint: String,
    pub features: FeatureSpec,
    pub target_scale: TargetScale,
    /// Category values per column index, in code order.
    pub vocabularies: BTreeMap<usize, Vec<String>>,
    pub summary: TrainingSummary,
    pub seed: u64,
    pub backend: Backend,
    /// blake3 (hex) of every other file in the folder, by file name.
    pub files: BTreeMap<String, String>,
    /// blake3 of the weight values (see `Model::weights_digest`).
    pub weights_digest: String,
    pub tool_version: String,
}

impl Manifest {
    /// Vocabularies rebuilt from the stored value lists.
    pub fn vocabularies(&self) -> Vocabularies {
        self.vocabularies
            .iter()
            .map(|(k, v)| (*k, Vocab::from_values(v.clone())))
            .collect()
    }
}

/// What the caller knows about a new version that training does not.
#[derive(Debug, Clone)]
pub struct CheckpointMeta<'a> {
    pub id: ModelId,
    pub parent: Option<ModelId>,
    pub created_at: DateTime<Utc>,
    pub schema_fingerprint: &'a str,
    pub vocabularies: &'a Vocabularies,
}

/// A loaded model version.
#[derive(Debug, Clone)]
pub struct Checkpoint {
    pub manifest: Manifest,
    pub model: Model,
}

/// Folder of model `id` under `models_dir`.
pub fn model_dir(models_dir: &Path, id: ModelId) -> PathBuf {
    models_dir.join(id.to_string())
}

fn io(action: &'static str, path: &Path) -> impl FnOnce(std::io::Error) -> ModelError {
    let path = path.to_path_buf();
    move |source| ModelError::Io {
        action,
        path,
        source,
    }
}

fn write_synced(path: &Path, bytes: &[u8]) -> Result<(), ModelError> {
    let mut f = fs::File::create(path).map_err(io("create", path))?;
    f.write_all(bytes).map_err(io("write", path))?;
    f.sync_all().map_err(io("fsync", path))
}

impl Model {
    /// Writes this model as version `meta.id` under `models_dir` and returns
    /// its folder. Refuses to overwrite an existing version.
    pub fn save(
        &self,
        models_dir: &Path,
        summary: &TrainingSummary,
        meta: &CheckpointMeta<'_>,
    ) -> Result<PathBuf, ModelError> {
        fs::create_dir_all(models_dir).map_err(io("create folder", models_dir))?;
        let dest = model_dir(models_dir, meta.id);
        if dest.exists() {
            return Err(ModelError::Exists { path: dest });
        }
        let tmp = models_dir.join(format!("{TEMP_PREFIX}{}-{}", std::process::id(), meta.id));
        if tmp.exists() {
            fs::remove_dir_all(&tmp).map_err(io("remove stale temp folder", &tmp))?;
        }
        fs::create_dir(&tmp).map_err(io("create folder", &tmp))?;
        let result = self.write_files(&tmp, summary, meta).and_then(|()| {
            sync_dir(&tmp).map_err(io("fsync", &tmp))?;
            fs::rename(&tmp, &dest).map_err(io("rename into place", &dest))?;
            sync_dir(models_dir).map_err(io("fsync", models_dir))
        });
        if result.is_err() {
            let _ = fs::remove_dir_all(&tmp);
        }
        result.map(|()| dest)
    }

    fn write_files(
        &self,
        dir: &Path,
        summary: &TrainingSummary,
        meta: &CheckpointMeta<'_>,
    ) -> Result<(), ModelError> {
        let record_err = |path: &Path| {
            let path = path.to_path_buf();
            move |e: burn::store::RecordError| ModelError::Record {
                path,
                message: e.to_string(),
            }
        };
        let mut files = BTreeMap::new();
        let weights_path = dir.join(WEIGHTS_FILE);
        let weights = self
            .net()
            .valid()
            .into_record()
            .into_bytes()
            .map_err(record_err(&weights_path))?;
        write_synced(&weights_path, &weights)?;
        files.insert(
            WEIGHTS_FILE.to_string(),
            blake3::hash(&weights).to_hex().to_string(),
        );
        let optimizer_path = dir.join(OPTIMIZER_FILE);
        let optimizer = self
            .optimizer()
            .into_bytes()
            .map_err(record_err(&optimizer_path))?;
        crate::failpoint::hit("cycle:mid-checkpoint").map_err(io("write", &optimizer_path))?;
        write_synced(&optimizer_path, &optimizer)?;
        files.insert(
            OPTIMIZER_FILE.to_string(),
            blake3::hash(&optimizer).to_hex().to_string(),
        );

        let manifest = Manifest {
            format: MANIFEST_FORMAT,
            id: meta.id,
            parent: meta.parent,
            created_at: meta.created_at.to_rfc3339_opts(SecondsFormat::Millis, true),
            kind: summary.kind,
            model: self.config().clone(),
            training: summary.config.clone(),
            schema_fingerprint: meta.schema_fingerprint.to_string(),
            features: self.spec().clone(),
            target_scale: self.target_scale(),
            vocabularies: meta
                .vocabularies
                .iter()
                .map(|(k, v)| (*k, v.values().to_vec()))
                .collect(),
            summary: summary.clone(),
            seed: summary.config.seed,
            backend: self.backend(),
            files,
            weights_digest: self.weights_digest(),
            tool_version: env!("CARGO_PKG_VERSION").to_string(),
        };
        let manifest_path = dir.join(MANIFEST_FILE);
        let mut text = serde_json::to_vec_pretty(&manifest).map_err(|e| ModelError::Manifest {
            path: manifest_path.clone(),
            message: e.to_string(),
        })?;
        text.push(b'\n');
        write_synced(&manifest_path, &text)
    }
}

/// Reads and parses `dir/manifest.json` without touching the weights.
pub fn read_manifest(dir: &Path) -> Result<Manifest, ModelError> {
    let path = dir.join(MANIFEST_FILE);
    let bytes = match fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(ModelError::Missing {
                path: dir.to_path_buf(),
                what: format!("{MANIFEST_FILE} not found"),
            });
        }
        Err(e) => return Err(io("read", &path)(e)),
    };
    let manifest: Manifest = serde_json::from_slice(&bytes).map_err(|e| ModelError::Manifest {
        path: path.clone(),
        message: e.to_string(),
    })?;
    if manifest.format != MANIFEST_FORMAT {
        return Err(ModelError::Manifest {
            path,
            message: format!(
                "format {} is not the supported format {MANIFEST_FORMAT}",
                manifest.format
            ),
        });
    }
    Ok(manifest)
}

/// Reads a file and checks it against the manifest's hash.
fn read_verified(dir: &Path, manifest: &Manifest, name: &str) -> Result<Vec<u8>, ModelError> {
    let path = dir.join(name);
    let Some(expected) = manifest.files.get(name) else {
        return Err(ModelError::Manifest {
            path: dir.join(MANIFEST_FILE),
            message: format!("no hash listed for {name}"),
        });
    };
    let bytes = match fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(ModelError::Missing {
                path: dir.to_path_buf(),
                what: format!("{name} not found"),
            });
        }
        Err(e) => return Err(io("read", &path)(e)),
    };
    let found = blake3::hash(&bytes).to_hex().to_string();
    if &found != expected {
        return Err(ModelError::Hash {
            path,
            expected: expected.clone(),
            found,
        });
    }
    Ok(bytes)
}

/// Checks every file hash of the checkpoint in `dir` (for `verify`).
pub fn verify(dir: &Path) -> Result<Manifest, ModelError> {
    let manifest = read_manifest(dir)?;
    for name in [WEIGHTS_FILE, OPTIMIZER_FILE] {
        read_verified(dir, &manifest, name)?;
    }
    Ok(manifest)
}

impl Checkpoint {
    /// Loads the model version in `dir`, refusing it when its files do not
    /// match their hashes or it was trained for another schema.
    pub fn load(dir: &Path, schema_fingerprint: &str) -> Result<Checkpoint, ModelError> {
        let manifest = read_manifest(dir)?;
        if manifest.schema_fingerprint != schema_fingerprint {
            return Err(ModelError::Schema {
                path: dir.to_path_buf(),
                expected: schema_fingerprint.to_string(),
                found: manifest.schema_fingerprint.clone(),
            });
        }
        let weights = read_verified(dir, &manifest, WEIGHTS_FILE)?;
        let optimizer = read_verified(dir, &manifest, OPTIMIZER_FILE)?;
        let model =
            model_from_records(&manifest, weights, optimizer).map_err(|(name, message)| {
                ModelError::Record {
                    path: dir.join(name),
                    message,
                }
            })?;
        let digest = model.weights_digest();
        if digest != manifest.weights_digest {
            return Err(ModelError::Hash {
                path: dir.join(WEIGHTS_FILE),
                expected: manifest.weights_digest.clone(),
                found: digest,
            });
        }
        Ok(Checkpoint { manifest, model })
    }
}

fn model_from_records(
    manifest: &Manifest,
    weights: Vec<u8>,
    optimizer: Vec<u8>,
) -> Result<Model, (&'static str, String)> {
    let spec: &FeatureSpec = &manifest.features;
    if spec.width() == 0 || spec.outputs == 0 {
        return Err((
            MANIFEST_FILE,
            format!(
                "the manifest describes a network with input width {} and {} outputs",
                spec.width(),
                spec.outputs
            ),
        ));
    }
    let widths = layer_widths(spec, &manifest.model);
    let skeleton: Vec<LayerWeights> = widths
        .windows(2)
        .map(|w| LayerWeights {
            inputs: w[0],
            outputs: w[1],
            weight: vec![0.0; w[0] * w[1]],
            bias: vec![0.0; w[1]],
        })
        .collect();
    let net = Net::from_weights(
        &skeleton,
        manifest.model.activation,
        manifest.model.dropout,
        &device(manifest.backend),
    );
    let record = ModuleRecord::from_bytes(Bytes::from_bytes_vec(weights))
        .map_err(|e| (WEIGHTS_FILE, e.to_string()))?;
    let net = net
        .try_load_record(record)
        .map_err(|e| (WEIGHTS_FILE, e.to_string()))?;
    let loaded = net.weights();
    let optimizer: ModuleOptimizer = adam()
        .from_bytes(Bytes::from_bytes_vec(optimizer))
        .map_err(|e| (OPTIMIZER_FILE, e.to_string()))?;
    Ok(Model::from_parts(
        spec.clone(),
        manifest.model.clone(),
        manifest.target_scale,
        manifest.backend,
        &loaded,
        optimizer,
    ))
}
