//! ONNX export of a model version: the graph (`graph`, pure), the protobuf
//! messages it is written with (`proto`), and the files on disk: the `.onnx`
//! file and its manifest `<file>.json` beside it (model id, schema
//! fingerprint, opset, blake3 of the ONNX file and of the checkpoint's
//! manifest, the graph's inputs and outputs).
//!
//! With `[export] path` set, the serving model follows every change of the
//! serving pointer: `follow` is called right after a promotion, approval or
//! rollback has moved the pointer (and `state/serving`), replaces the file
//! atomically and records a `model-exported` audit entry with its hash, so
//! the exports happen, and are logged, in the audit log's order. A crash
//! between the pointer's move and the export is repaired by `catch_up` at
//! the next start of an owner; `check` (part of `verify`) rebuilds the file
//! from the serving checkpoint and compares it byte for byte.

pub mod graph;
pub mod proto;

use std::path::{Path, PathBuf};

use chrono::{SecondsFormat, Utc};
use prost::Message;
use serde::{Deserialize, Serialize};

use crate::audit::{Event, Mirror};
use crate::config::{Config, Task};
use crate::ids::ModelId;
use crate::model::ModelError;
use crate::model::checkpoint::{self, Checkpoint, model_dir};
use crate::schema::Schema;
use crate::state::{Owner, StateDir, StateError};
use crate::store::Store;

pub use graph::{GraphError, IR_VERSION, ML_OPSET, OPSET, Port};

/// Version of the export manifest's layout.
pub const MANIFEST_FORMAT: u32 = 1;

/// Why an export could not be written.
#[derive(Debug, thiserror::Error)]
pub enum ExportError {
    #[error("cannot export model {model}: {source}")]
    Model {
        model: ModelId,
        #[source]
        source: ModelError,
    },
    #[error("cannot export model {model}: {source}")]
    Graph {
        model: ModelId,
        #[source]
        source: GraphError,
    },
    #[error("model {model} does not exist in {dir}; list model versions with `tidegate models`")]
    NoModel { model: ModelId, dir: PathBuf },
    #[error("cannot {action} {path}: {source}")]
    Io {
        action: &'static str,
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

fn io(action: &'static str, path: &Path) -> impl FnOnce(std::io::Error) -> ExportError {
    let path = path.to_path_buf();
    move |source| ExportError::Io {
        action,
        path,
        source,
    }
}

/// What `<file>.json` says about an exported file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ExportManifest {
    pub format: u32,
    pub model: ModelId,
    pub schema_fingerprint: String,
    pub task: Task,
    pub target: String,
    pub ir_version: i64,
    pub opset: i64,
    pub ml_opset: i64,
    /// File name of the ONNX file (in the same folder).
    pub onnx_file: String,
    pub onnx_blake3: String,
    pub onnx_bytes: u64,
    /// blake3 of the checkpoint's manifest.json, as in its
    /// `candidate-trained` audit entry.
    pub checkpoint_manifest_blake3: String,
    /// blake3 of the weight values (see `Model::weights_digest`).
    pub weights_digest: String,
    pub inputs: Vec<Port>,
    pub outputs: Vec<Port>,
    /// UTC, RFC 3339. Kept out of the ONNX file, whose bytes depend on the
    /// model alone.
    pub exported_at: String,
    pub tool_version: String,
}

/// The manifest's path: the ONNX file's name with `.json` appended.
pub fn manifest_path(onnx: &Path) -> PathBuf {
    let mut name = onnx.file_name().unwrap_or_default().to_os_string();
    name.push(".json");
    onnx.with_file_name(name)
}

/// The configured export file, relative paths taken from the state dir.
pub fn configured_path(state: &StateDir, config: &Config) -> Option<PathBuf> {
    config.export.path.as_ref().map(|p| {
        if p.is_absolute() {
            p.clone()
        } else {
            state.root().join(p)
        }
    })
}

/// An export built in memory, not yet written.
#[derive(Debug, Clone)]
pub struct Prepared {
    pub bytes: Vec<u8>,
    pub manifest: ExportManifest,
}

/// Builds the ONNX file of model `id` from its checkpoint (verified on
/// load) and the config's column names.
pub fn prepare(state: &StateDir, config: &Config, id: ModelId) -> Result<Prepared, ExportError> {
    let dir = model_dir(&state.models(), id);
    if !dir.is_dir() {
        return Err(ExportError::NoModel {
            model: id,
            dir: state.models(),
        });
    }
    let cp = Checkpoint::load(&dir, &config.schema_fingerprint())
        .map_err(|source| ExportError::Model { model: id, source })?;
    let manifest_file = dir.join(checkpoint::MANIFEST_FILE);
    let checkpoint_hash = std::fs::read(&manifest_file)
        .map(|b| blake3::hash(&b).to_hex().to_string())
        .map_err(io("read", &manifest_file))?;
    let schema = Schema::from_config(config);
    let names: Vec<String> = schema.columns.iter().map(|c| c.name.clone()).collect();
    let target = names[schema.target].clone();
    let spec = cp.model.spec();
    let layers = cp.model.weights();
    let weights_digest = cp.manifest.weights_digest.clone();
    let built = graph::build(&graph::GraphInput {
        column_names: &names,
        spec,
        layers: &layers,
        activation: cp.model.config().activation,
        target_scale: cp.model.target_scale(),
        vocabularies: &cp.manifest.vocabularies,
        metadata: vec![
            ("tidegate.model".into(), id.to_string()),
            (
                "tidegate.schema_fingerprint".into(),
                cp.manifest.schema_fingerprint.clone(),
            ),
            ("tidegate.weights_digest".into(), weights_digest.clone()),
            (
                "tidegate.checkpoint_manifest_blake3".into(),
                checkpoint_hash.clone(),
            ),
        ],
        producer_version: env!("CARGO_PKG_VERSION"),
    })
    .map_err(|source| ExportError::Graph { model: id, source })?;
    let bytes = built.model.encode_to_vec();
    let manifest = ExportManifest {
        format: MANIFEST_FORMAT,
        model: id,
        schema_fingerprint: cp.manifest.schema_fingerprint.clone(),
        task: spec.task,
        target,
        ir_version: IR_VERSION,
        opset: OPSET,
        ml_opset: ML_OPSET,
        onnx_file: String::new(),
        onnx_blake3: blake3::hash(&bytes).to_hex().to_string(),
        onnx_bytes: bytes.len() as u64,
        checkpoint_manifest_blake3: checkpoint_hash,
        weights_digest,
        inputs: built.inputs,
        outputs: built.outputs,
        exported_at: Utc::now().to_rfc3339_opts(SecondsFormat::Millis, true),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
    };
    Ok(Prepared { bytes, manifest })
}

/// Writes a prepared export to `out` and its manifest beside it, each
/// replaced atomically (temp file, fsync, rename, fsync of the folder).
/// The ONNX file goes first: a reader that finds the manifest naming a
/// model finds that model's file already in place.
pub fn write(prepared: &mut Prepared, out: &Path) -> Result<(), ExportError> {
    let dir = out.parent().filter(|p| !p.as_os_str().is_empty());
    if let Some(dir) = dir
        && !dir.is_dir()
    {
        std::fs::create_dir_all(dir).map_err(io("create folder", dir))?;
        if let Some(up) = dir.parent().filter(|p| !p.as_os_str().is_empty()) {
            crate::fsutil::sync_dir(up).map_err(io("fsync", up))?;
        }
    }
    prepared.manifest.onnx_file = out
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    crate::failpoint::hit("export:before-write").map_err(io("write", out))?;
    crate::fsutil::write_atomic(out, &prepared.bytes).map_err(io("write", out))?;
    let mpath = manifest_path(out);
    let mut text = serde_json::to_vec_pretty(&prepared.manifest).expect("manifest serialises");
    text.push(b'\n');
    crate::fsutil::write_atomic(&mpath, &text).map_err(io("write", &mpath))
}

/// Writes the export of `id` to `out` (the `onnx` command).
pub fn export_to(
    state: &StateDir,
    config: &Config,
    id: ModelId,
    out: &Path,
) -> Result<ExportManifest, ExportError> {
    let mut prepared = prepare(state, config, id)?;
    write(&mut prepared, out)?;
    Ok(prepared.manifest)
}

/// Exports `id` to the configured path (nothing when none is configured)
/// and records a `model-exported` entry. Called right after the serving
/// pointer moved to `id`.
pub fn follow(owner: &mut Owner, id: ModelId, user: &str) -> Result<(), StateError> {
    follow_in(
        &owner.state,
        &owner.config,
        &mut owner.store,
        &owner.mirror,
        id,
        user,
    )
}

fn follow_in(
    state: &StateDir,
    config: &Config,
    store: &mut Store,
    mirror: &Mirror,
    id: ModelId,
    user: &str,
) -> Result<(), StateError> {
    let Some(out) = configured_path(state, config) else {
        return Ok(());
    };
    let started = std::time::Instant::now();
    let mut prepared = prepare(state, config, id)?;
    write(&mut prepared, &out)?;
    let m = &prepared.manifest;
    let event = Event::ModelExported {
        model: id,
        file: out.display().to_string(),
        onnx_hash: m.onnx_blake3.clone(),
        checkpoint_manifest_hash: m.checkpoint_manifest_blake3.clone(),
        opset: m.opset,
    };
    let entry = store.record_with_meta(event, user, Utc::now(), &[])?;
    mirror.append(&[entry.line().as_bytes()])?;
    tracing::info!(
        "exported model {id} to {} in {:.1} ms",
        out.display(),
        started.elapsed().as_secs_f64() * 1e3
    );
    Ok(())
}

/// The manifest beside `out` and whether the file still has its hash.
fn current(out: &Path) -> Option<(ExportManifest, bool)> {
    let text = std::fs::read(manifest_path(out)).ok()?;
    let m: ExportManifest = serde_json::from_slice(&text).ok()?;
    let bytes = std::fs::read(out).ok()?;
    let same = blake3::hash(&bytes).to_hex().to_string() == m.onnx_blake3;
    Some((m, same))
}

/// At the start of an owner: when the configured export does not hold the
/// serving model (a crash came between the pointer's move and the export,
/// or the path was just configured), writes it now. Returns whether it did.
pub fn catch_up(
    state: &StateDir,
    config: &Config,
    store: &mut Store,
    mirror: &Mirror,
    user: &str,
) -> Result<bool, StateError> {
    let Some(out) = configured_path(state, config) else {
        return Ok(false);
    };
    // A crash mid-write leaves a temp file beside the export, which may be
    // outside the state dir's own folders.
    if let Some(dir) = out.parent() {
        crate::fsutil::remove_stale_temps(dir).map_err(io("clean up", dir))?;
    }
    let Some(id) = store.serving()? else {
        return Ok(false);
    };
    if let Some((m, true)) = current(&out)
        && m.model == id
    {
        return Ok(false);
    }
    follow_in(state, config, store, mirror, id, user)?;
    Ok(true)
}

/// For `verify`: with an export configured and a model serving, the file
/// must be the serving model's export exactly (rebuilt from its checkpoint
/// and compared byte for byte), its manifest must name that model and hash,
/// and the last `model-exported` entry must record the same hash.
/// `Ok(Some(what))` is a problem found.
pub fn check(owner: &Owner) -> Result<Option<String>, StateError> {
    let Some(out) = configured_path(&owner.state, &owner.config) else {
        return Ok(None);
    };
    let Some(id) = owner.store.serving()? else {
        return Ok(None);
    };
    let shown = out.display();
    let bytes = match std::fs::read(&out) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Ok(Some(format!(
                "the export {shown} is missing; the next start of an owner (e.g. `tidegate watch`) writes it again"
            )));
        }
        Err(e) => {
            return Err(ExportError::Io {
                action: "read",
                path: out,
                source: e,
            }
            .into());
        }
    };
    let found = blake3::hash(&bytes).to_hex().to_string();
    let rebuilt = match prepare(&owner.state, &owner.config, id) {
        Ok(p) => p,
        Err(e) => return Ok(Some(format!("the serving model cannot be exported: {e}"))),
    };
    if rebuilt.bytes != bytes {
        return Ok(Some(format!(
            "the export {shown} is not the serving model {id}'s ONNX graph (blake3 {found}, expected {}); \
             it was changed, or written by another tidegate version: `tidegate onnx --output {shown}` rewrites it",
            rebuilt.manifest.onnx_blake3
        )));
    }
    let Some((m, _)) = current(&out) else {
        return Ok(Some(format!(
            "the manifest {} is missing or unreadable",
            manifest_path(&out).display()
        )));
    };
    if m.model != id || m.onnx_blake3 != found {
        return Ok(Some(format!(
            "the manifest {} names model {} and blake3 {}, but {id} serves and the file's blake3 is {found}",
            manifest_path(&out).display(),
            m.model,
            m.onnx_blake3
        )));
    }
    let mut last = None;
    for (_, line) in owner.store.audit_entries()? {
        if let Ok(entry) = crate::audit::Entry::from_line(&line)
            && let Event::ModelExported {
                model, onnx_hash, ..
            } = entry.event
        {
            last = Some((model, onnx_hash));
        }
    }
    match last {
        Some((model, hash)) if model == id && hash == found => Ok(None),
        Some((model, hash)) => Ok(Some(format!(
            "the last model-exported entry records model {model} with blake3 {hash}, but the export holds {id} with blake3 {found}"
        ))),
        None => Ok(Some(format!(
            "no model-exported entry records the export {shown}"
        ))),
    }
}
