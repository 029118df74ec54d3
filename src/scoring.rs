//! One model version loaded for scoring rows: the checkpoint, the schema and
//! vocabularies it reads rows with, and the parsing limits. `tidegate
//! predict` and the daemon's prediction endpoint both score through it, so a
//! row is checked and predicted the same way whichever path it takes.

use std::collections::BTreeMap;
use std::path::Path;

use crate::config::{Backend, Config};
use crate::ids::ModelId;
use crate::ingest::{self, Limits, Refusal};
use crate::model::checkpoint::{Checkpoint, model_dir};
use crate::model::direct::DirectNet;
use crate::model::{ModelError, Predictions};
use crate::schema::{Schema, Vocabularies};

/// A model version ready to score CSV rows.
#[derive(Debug)]
pub struct Scorer {
    pub id: ModelId,
    pub checkpoint: Checkpoint,
    pub schema: Schema,
    pub vocabs: Vocabularies,
    pub limits: Limits,
    pub backend: Backend,
    /// The network as plain matrices, for `score_direct`.
    direct: DirectNet,
}

/// Rows scored: the predictions, in row order, and what the model could not
/// know about them.
#[derive(Debug)]
pub struct Scored {
    pub predictions: Predictions,
    /// Category values the model has not seen, per column index; scored as
    /// none of the known values.
    pub unseen: BTreeMap<usize, Vec<String>>,
    /// Whether the rows carried the target column.
    pub has_target: bool,
    pub rows: crate::schema::RowMatrix,
}

/// Why a model version could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    #[error("model {id} does not exist in {}", dir.display())]
    Missing {
        id: ModelId,
        dir: std::path::PathBuf,
    },
    #[error(transparent)]
    Model(#[from] ModelError),
}

impl Scorer {
    /// Loads model `id` from `models_dir` for rows described by `config`.
    pub fn load(models_dir: &Path, config: &Config, id: ModelId) -> Result<Scorer, LoadError> {
        let dir = model_dir(models_dir, id);
        if !dir.is_dir() {
            return Err(LoadError::Missing {
                id,
                dir: models_dir.to_path_buf(),
            });
        }
        let checkpoint = Checkpoint::load(&dir, &config.schema_fingerprint())?;
        let vocabs = checkpoint.manifest.vocabularies();
        let direct = checkpoint.model.direct();
        Ok(Scorer {
            direct,
            id,
            checkpoint,
            schema: Schema::from_config(config),
            vocabs,
            limits: Limits::of(config),
            backend: config.training.predict_backend,
        })
    }

    /// Parses CSV bytes (header, then rows) with the checks of `ingest`,
    /// the target column optional, and predicts every row. A refusal lists
    /// each problem with its line and column.
    pub fn score(&self, csv: &[u8]) -> Result<Result<Scored, Refusal>, ModelError> {
        self.score_with(csv, false)
    }

    /// `score` for a few rows (the prediction endpoint's requests): the
    /// network runs on plain slices instead of burn, which has a set-up cost
    /// per call that dwarfs a small request. Values equal `score`'s up to
    /// f32 rounding (1e-5 relative).
    pub fn score_direct(&self, csv: &[u8]) -> Result<Result<Scored, Refusal>, ModelError> {
        self.score_with(csv, true)
    }

    fn score_with(&self, csv: &[u8], direct: bool) -> Result<Result<Scored, Refusal>, ModelError> {
        let parsed = match ingest::parse_for_scoring(csv, &self.schema, &self.vocabs, &self.limits)
        {
            Ok(p) => p,
            Err(refusal) => return Ok(Err(refusal)),
        };
        let model = &self.checkpoint.model;
        let predictions = if direct {
            model.predict_direct(&self.direct, &parsed.rows)?
        } else {
            model.predict(&parsed.rows, self.backend)?
        };
        Ok(Ok(Scored {
            predictions,
            unseen: parsed.unseen,
            has_target: parsed.has_target,
            rows: parsed.rows,
        }))
    }

    /// Name of the target column.
    pub fn target_name(&self) -> &str {
        &self.schema.columns[self.schema.target].name
    }

    /// Label of class `code` of a classification target (its number when
    /// the vocabulary does not name it).
    pub fn class_name(&self, code: u32) -> String {
        self.vocabs
            .get(&self.schema.target)
            .and_then(|v| v.value(code))
            .map_or_else(|| code.to_string(), str::to_string)
    }
}
