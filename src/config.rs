//! `tidegate.toml`: the typed configuration, its defaults, and validation
//! whose errors point at the line and column and say what is allowed.
//!
//! Only this module knows the file format (serde + toml). Every section
//! except `[data]` has defaults, so a minimal config names the columns and
//! nothing else.

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use toml::Spanned;

/// The whole configuration file.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    pub data: DataConfig,
    #[serde(default)]
    pub model: ModelConfig,
    #[serde(default)]
    pub training: TrainingConfig,
    #[serde(default)]
    pub gate: GateConfig,
    #[serde(default)]
    pub daemon: DaemonConfig,
    #[serde(default)]
    pub drift: DriftConfig,
    #[serde(default)]
    pub export: ExportConfig,
    #[serde(default)]
    pub memory: MemoryConfig,
}

/// How much memory a retrain cycle's rows may take.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct MemoryConfig {
    /// MiB for the rows a cycle holds: the warm candidate's rows, a slice
    /// of holdout rows being scored, and a cold candidate's training rows
    /// (as cells and encoded inputs). A cold candidate whose rows do not
    /// fit in what is left streams them from the store in shuffled blocks,
    /// epoch after epoch, instead of reading them all (`train::stream`).
    pub cycle_mb: f64,
}

impl Default for MemoryConfig {
    fn default() -> Self {
        MemoryConfig { cycle_mb: 1024.0 }
    }
}

impl MemoryConfig {
    /// The budget in bytes.
    pub fn cycle_bytes(&self) -> u64 {
        (self.cycle_mb * 1024.0 * 1024.0) as u64
    }
}

/// Where the serving model is kept as an ONNX file.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct ExportConfig {
    /// The ONNX file rewritten after every promotion, approval and
    /// rollback (manifest beside it as `<path>.json`); relative paths are
    /// taken from the state dir. Off when unset.
    pub path: Option<PathBuf>,
}

/// How each accepted batch's drift is judged (see `drift::Rule`).
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct DriftConfig {
    /// Past batches a column needs before it can be flagged.
    pub min_batches: usize,
    /// Past batches' distances kept per column.
    pub window: usize,
    /// Flag when the robust z of the distance exceeds this.
    pub threshold: f64,
    /// Smallest spread the z divides by, as a share of the median distance.
    pub spread_floor: f64,
    /// The stored training rows compared against are thinned evenly to at
    /// most this many.
    pub max_reference_rows: usize,
    /// Keys of the fixed-level tests of older versions. Still accepted so
    /// an existing config loads; they no longer change anything.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ks_alpha: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub psi_warn: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub psi_alert: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chi_alpha: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unseen_share: Option<f64>,
}

impl Default for DriftConfig {
    fn default() -> Self {
        let r = crate::drift::Rule::default();
        DriftConfig {
            min_batches: r.min_batches,
            window: r.window,
            threshold: r.threshold,
            spread_floor: r.spread_floor,
            max_reference_rows: 20_000,
            ks_alpha: None,
            psi_warn: None,
            psi_alert: None,
            chi_alpha: None,
            unseen_share: None,
        }
    }
}

impl DriftConfig {
    pub fn rule(&self) -> crate::drift::Rule {
        crate::drift::Rule {
            min_batches: self.min_batches,
            window: self.window,
            threshold: self.threshold,
            spread_floor: self.spread_floor,
        }
    }

    /// Old keys present in the file, which no longer do anything.
    pub fn ignored_keys(&self) -> Vec<&'static str> {
        [
            ("ks_alpha", self.ks_alpha.is_some()),
            ("psi_warn", self.psi_warn.is_some()),
            ("psi_alert", self.psi_alert.is_some()),
            ("chi_alpha", self.chi_alpha.is_some()),
            ("unseen_share", self.unseen_share.is_some()),
        ]
        .into_iter()
        .filter_map(|(k, present)| present.then_some(k))
        .collect()
    }
}

/// What the rows look like and how they are split.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct DataConfig {
    /// Name of the column the model predicts.
    pub target: Spanned<String>,
    pub task: Task,
    pub columns: Vec<ColumnConfig>,
    /// Share of rows kept aside for the gate, decided by a hash of each row.
    #[serde(default = "default_holdout_fraction")]
    pub holdout_fraction: Spanned<f64>,
    /// Files larger than this are refused before reading.
    #[serde(default = "default_max_file_bytes")]
    pub max_file_bytes: u64,
    /// Fields longer than this (in bytes) are refused.
    #[serde(default = "default_max_field_bytes")]
    pub max_field_bytes: usize,
}

/// The learning task.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Task {
    Regression,
    Classification,
}

impl fmt::Display for Task {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Task::Regression => "regression",
            Task::Classification => "classification",
        })
    }
}

/// One CSV column.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct ColumnConfig {
    pub name: Spanned<String>,
    pub kind: ColumnKind,
    /// Smallest allowed value (numbers only).
    #[serde(default)]
    pub min: Option<Spanned<f64>>,
    /// Largest allowed value (numbers only).
    #[serde(default)]
    pub max: Option<Spanned<f64>>,
    /// When false an empty field is accepted and stored as missing.
    #[serde(default = "default_true")]
    pub required: bool,
}

/// How a column's text is read.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ColumnKind {
    Number,
    Category,
}

impl fmt::Display for ColumnKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            ColumnKind::Number => "number",
            ColumnKind::Category => "category",
        })
    }
}

/// The network's shape.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct ModelConfig {
    /// Hidden layer widths; an empty list is a linear model.
    pub hidden: Vec<usize>,
    pub activation: Activation,
    /// Dropout probability on hidden layers during training.
    pub dropout: f64,
    /// L2 penalty weight (sum of squared weights).
    pub l2: f64,
    /// L1 penalty weight (sum of absolute weights).
    pub l1: f64,
    /// Multiplier on the default initial weight scale.
    pub init_scale: f64,
}

impl Default for ModelConfig {
    fn default() -> Self {
        ModelConfig {
            hidden: vec![64, 64],
            activation: Activation::Relu,
            dropout: 0.0,
            l2: 0.0,
            l1: 0.0,
            init_scale: 1.0,
        }
    }
}

/// Hidden-layer activation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Activation {
    Relu,
    Tanh,
    Sigmoid,
}

/// CPU backend that runs the tensors.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Backend {
    Flex,
    Ndarray,
}

/// Budgets and optimiser settings for cold and warm training.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct TrainingConfig {
    /// Backend used for training.
    pub backend: Backend,
    /// Backend used for batch prediction.
    pub predict_backend: Backend,
    /// Largest mini-batch.
    pub batch_size: usize,
    /// A run on few rows takes smaller mini-batches (never under 16 rows),
    /// so that an epoch is at least this many optimizer steps; 1 keeps
    /// `batch_size` whatever the rows.
    pub min_batches_per_epoch: usize,
    pub learning_rate: f64,
    /// Learning rate for warm runs; the cold rate when unset.
    pub warm_learning_rate: Option<f64>,
    pub cold_epochs: usize,
    pub warm_epochs: usize,
    /// Wall-clock budget of one training run.
    pub max_seconds: f64,
    /// Epochs without validation improvement before stopping.
    pub patience: usize,
    /// Share of training rows used for early stopping.
    pub validation_fraction: f64,
    pub seed: u64,
    /// Old rows replayed per new row in a warm run.
    pub replay_ratio: f64,
    /// Shrink-and-perturb: θ ← shrink·θ + perturb·θ_fresh (1.0 and 0.0 turn it off).
    pub shrink: f64,
    pub perturb: f64,
    /// A warm parent's standardisation of a number column is refreshed (and
    /// folded into its first layer) when the column's mean moved more than
    /// this many old standard deviations or its std changed by more than
    /// this share; 0 never refreshes.
    pub rescale_threshold: f64,
    /// Exponential average of the weights over optimizer steps (0 = off):
    /// epochs are judged, and the best one kept, by the averaged weights.
    pub weight_average_decay: f64,
}

impl Default for TrainingConfig {
    fn default() -> Self {
        TrainingConfig {
            backend: Backend::Flex,
            predict_backend: Backend::Flex,
            batch_size: 256,
            min_batches_per_epoch: 16,
            learning_rate: 1e-3,
            warm_learning_rate: Some(1e-4),
            cold_epochs: 100,
            warm_epochs: 40,
            max_seconds: 600.0,
            patience: 8,
            validation_fraction: 0.1,
            seed: 42,
            replay_ratio: 4.0,
            shrink: 1.0,
            perturb: 0.0,
            rescale_threshold: 0.5,
            weight_average_decay: 0.0,
        }
    }
}

/// When a candidate may replace the serving model.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct GateConfig {
    /// Smallest relative improvement in mean holdout loss that counts.
    pub min_improvement: f64,
    /// Significance level of the one-sided paired test.
    pub alpha: f64,
    /// No decision to promote is made on fewer holdout rows.
    pub min_holdout_rows: usize,
    /// Nor on holdout rows from fewer batches: rows of one file share a
    /// day, so batches are the unit of evidence (at least 2).
    pub min_holdout_batches: usize,
    /// Winning candidates wait for `approve` instead of serving at once.
    pub require_approval: bool,
    /// Train a cold candidate every this many cycles (0 = only on request).
    pub cold_every: usize,
    /// Penalty of the ridge baseline scored beside the network each cycle.
    pub ridge_lambda: f64,
    /// Smallest accepted batch the fresh-data check runs a test on.
    pub fresh_min_rows: usize,
    /// Roll back by itself when the fresh-data check finds the serving model
    /// significantly worse than the one it replaced (never in approval mode).
    pub auto_rollback: bool,
    /// Level of the fresh-data check's shift flags, per batch. A flag is a
    /// reason to look, never an action by itself.
    pub shift_alpha: f64,
    /// Level of the suspect-batch check's test that a batch's targets have
    /// lost their relation to its inputs (a suspect batch is set aside).
    pub suspect_alpha: f64,
}

impl Default for GateConfig {
    fn default() -> Self {
        GateConfig {
            min_improvement: 0.01,
            alpha: 0.05,
            min_holdout_rows: 200,
            min_holdout_batches: 3,
            require_approval: false,
            cold_every: 7,
            ridge_lambda: 1.0,
            fresh_min_rows: 100,
            auto_rollback: true,
            shift_alpha: 0.01,
            suspect_alpha: 0.05,
        }
    }
}

/// What the daemon does when an accepted batch drifts (a drift-report
/// column flagged, or the serving model's loss rose on it).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum DriftAction {
    /// Report only; cycles follow `min_new_rows` and `train_at`.
    #[default]
    None,
    /// Start a normal cycle without waiting for `min_new_rows`.
    Train,
    /// Start a cycle whose winner waits for a person's approval.
    Hold,
    /// Start a cycle with a cold candidate beside the warm one.
    Cold,
}

impl DriftAction {
    pub fn name(self) -> &'static str {
        match self {
            DriftAction::None => "none",
            DriftAction::Train => "train",
            DriftAction::Hold => "hold",
            DriftAction::Cold => "cold",
        }
    }
}

/// The watcher's settings.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct DaemonConfig {
    /// Inbox folder; `<state>/inbox` when unset.
    pub inbox: Option<PathBuf>,
    /// Seconds a file written in place must be unchanged before it is taken.
    pub settle_seconds: f64,
    /// Accepted-but-untrained rows that start a retrain cycle.
    pub min_new_rows: usize,
    /// Optional daily training time, "HH:MM" local time.
    pub train_at: Option<String>,
    /// Seconds between full inbox listings, whatever the watcher reports.
    pub rescan_seconds: f64,
    /// What a drifting batch triggers.
    pub on_drift: DriftAction,
    /// "127.0.0.1:PORT" to serve /health and /metrics over HTTP; off when unset.
    pub metrics_addr: Option<String>,
    /// Allow a metrics_addr that is not a loopback address.
    pub metrics_allow_remote: bool,
    /// "127.0.0.1:PORT" to serve `POST /predict` over HTTP; off when unset.
    pub predict_addr: Option<String>,
    /// Allow a predict_addr that is not a loopback address.
    pub predict_allow_remote: bool,
    /// Most rows one prediction request may carry.
    pub predict_max_rows: usize,
    /// Largest prediction request body, in bytes.
    pub predict_max_body_bytes: usize,
    /// Seconds a prediction request's head, then its body, may take to arrive.
    pub predict_timeout_seconds: f64,
}

impl Default for DaemonConfig {
    fn default() -> Self {
        DaemonConfig {
            inbox: None,
            settle_seconds: 5.0,
            min_new_rows: 1000,
            train_at: None,
            rescan_seconds: 60.0,
            on_drift: DriftAction::None,
            metrics_addr: None,
            metrics_allow_remote: false,
            predict_addr: None,
            predict_allow_remote: false,
            predict_max_rows: 1000,
            predict_max_body_bytes: 1024 * 1024,
            predict_timeout_seconds: 5.0,
        }
    }
}

fn default_holdout_fraction() -> Spanned<f64> {
    Spanned::new(0..0, 0.2)
}
fn default_max_file_bytes() -> u64 {
    256 * 1024 * 1024
}
fn default_max_field_bytes() -> usize {
    1024
}
fn default_true() -> bool {
    true
}

/// A config that could not be read or does not make sense.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config {path}: {source}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("{path}:{line}:{column}: {message}")]
    Invalid {
        path: PathBuf,
        line: usize,
        column: usize,
        message: String,
    },
}

impl Config {
    /// Reads and validates a config file.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        Config::parse(&text, path)
    }

    /// Parses and validates config text; `path` is only used in messages.
    pub fn parse(text: &str, path: &Path) -> Result<Config, ConfigError> {
        let config: Config = toml::from_str(text).map_err(|e| {
            let (line, column) = e.span().map(|s| line_col(text, s.start)).unwrap_or((1, 1));
            ConfigError::Invalid {
                path: path.to_path_buf(),
                line,
                column,
                message: e.message().trim().to_string(),
            }
        })?;
        config.validate(text, path)?;
        for key in config.drift.ignored_keys() {
            tracing::warn!(
                "{}: [drift] {key} belongs to the old fixed-level drift tests and is ignored; \
                 drift is now judged against past batches (min_batches, window, threshold, \
                 spread_floor)",
                path.display()
            );
        }
        Ok(config)
    }

    fn validate(&self, text: &str, path: &Path) -> Result<(), ConfigError> {
        let fail = |span: Range<usize>, message: String| {
            let (line, column) = line_col(text, span.start);
            Err(ConfigError::Invalid {
                path: path.to_path_buf(),
                line,
                column,
                message,
            })
        };
        let data = &self.data;
        if data.columns.is_empty() {
            return fail(
                data.target.span(),
                "[data] has no columns: add [[data.columns]] tables with name and kind".into(),
            );
        }
        let mut seen = std::collections::HashSet::new();
        for col in &data.columns {
            let name = col.name.get_ref();
            if name.is_empty() || name.trim() != name || name.chars().any(char::is_control) {
                return fail(
                    col.name.span(),
                    format!(
                        "column name {name:?} must be non-empty, without surrounding spaces or control characters"
                    ),
                );
            }
            if crate::rowfile::RESERVED.contains(&name.as_str()) {
                return fail(
                    col.name.span(),
                    format!(
                        "column name {name:?} is reserved: the row files carry a column of that name; rename the column (e.g. {:?})",
                        format!("{name}_value")
                    ),
                );
            }
            if !seen.insert(name.as_str()) {
                return fail(
                    col.name.span(),
                    format!("column {name:?} is listed twice; each column name must be unique"),
                );
            }
            if col.kind == ColumnKind::Category
                && let Some(bound) = [&col.min, &col.max].into_iter().flatten().next()
            {
                return fail(
                    bound.span(),
                    format!(
                        "column {name:?} is a category; min and max apply to number columns only"
                    ),
                );
            }
            for bound in [&col.min, &col.max].into_iter().flatten() {
                if !bound.get_ref().is_finite() {
                    return fail(
                        bound.span(),
                        format!("bound of column {name:?} must be a finite number"),
                    );
                }
            }
            if let (Some(lo), Some(hi)) = (&col.min, &col.max)
                && lo.get_ref() > hi.get_ref()
            {
                return fail(
                    lo.span(),
                    format!(
                        "column {name:?} has min {} above max {}",
                        lo.get_ref(),
                        hi.get_ref()
                    ),
                );
            }
        }
        let target = data.target.get_ref();
        let Some(target_col) = data.columns.iter().find(|c| c.name.get_ref() == target) else {
            let names: Vec<&str> = data
                .columns
                .iter()
                .map(|c| c.name.get_ref().as_str())
                .collect();
            return fail(
                data.target.span(),
                format!(
                    "target {target:?} is not one of the columns; allowed: {}",
                    names.join(", ")
                ),
            );
        };
        let wanted = match data.task {
            Task::Regression => ColumnKind::Number,
            Task::Classification => ColumnKind::Category,
        };
        if target_col.kind != wanted {
            return fail(
                data.target.span(),
                format!(
                    "task {} needs a target column of kind {wanted}, but {target:?} is {}",
                    data.task, target_col.kind
                ),
            );
        }
        if !target_col.required {
            return fail(
                target_col.name.span(),
                format!("target column {target:?} must be required"),
            );
        }
        if data.columns.len() < 2 {
            return fail(
                data.target.span(),
                "add at least one input column besides the target".into(),
            );
        }
        let hf = *data.holdout_fraction.get_ref();
        if !(hf > 0.0 && hf < 1.0) {
            return fail(
                data.holdout_fraction.span(),
                format!("holdout_fraction {hf} must be between 0 and 1 (exclusive); 0.2 is usual"),
            );
        }
        let whole = |key: &str| key_span(text, key);
        if data.max_field_bytes == 0 {
            return fail(
                whole("max_field_bytes"),
                "max_field_bytes must be at least 1".into(),
            );
        }
        if data.max_file_bytes == 0 {
            return fail(
                whole("max_file_bytes"),
                "max_file_bytes must be at least 1".into(),
            );
        }
        let t = &self.training;
        let checks: [(&str, bool, &str); 13] = [
            (
                "batch_size",
                t.batch_size >= 1,
                "batch_size must be at least 1",
            ),
            (
                "min_batches_per_epoch",
                t.min_batches_per_epoch >= 1,
                "min_batches_per_epoch must be at least 1; 1 keeps batch_size on any number of rows",
            ),
            (
                "learning_rate",
                t.learning_rate > 0.0 && t.learning_rate.is_finite(),
                "learning_rate must be a positive number",
            ),
            (
                "warm_learning_rate",
                t.warm_learning_rate
                    .is_none_or(|r| r > 0.0 && r.is_finite()),
                "warm_learning_rate must be a positive number",
            ),
            (
                "max_seconds",
                t.max_seconds > 0.0 && t.max_seconds.is_finite(),
                "max_seconds must be a positive number",
            ),
            (
                "validation_fraction",
                t.validation_fraction > 0.0 && t.validation_fraction < 1.0,
                "validation_fraction must be between 0 and 1 (exclusive)",
            ),
            (
                "replay_ratio",
                t.replay_ratio >= 0.0 && t.replay_ratio.is_finite(),
                "replay_ratio must be 0 or more",
            ),
            (
                "shrink",
                t.shrink > 0.0 && t.shrink <= 1.0,
                "shrink must be in (0, 1]; 1 turns shrink-and-perturb off",
            ),
            (
                "perturb",
                t.perturb >= 0.0 && t.perturb <= 1.0,
                "perturb must be in [0, 1]; 0 turns shrink-and-perturb off",
            ),
            (
                "weight_average_decay",
                (0.0..1.0).contains(&t.weight_average_decay),
                "weight_average_decay must be 0 (off) or in (0, 1), such as 0.99",
            ),
            (
                "rescale_threshold",
                t.rescale_threshold >= 0.0 && t.rescale_threshold.is_finite(),
                "rescale_threshold must be 0 (never) or more; 0.5 is usual",
            ),
            (
                "cold_epochs",
                t.cold_epochs >= 1,
                "cold_epochs must be at least 1",
            ),
            (
                "warm_epochs",
                t.warm_epochs >= 1,
                "warm_epochs must be at least 1",
            ),
        ];
        for (key, ok, msg) in checks {
            if !ok {
                return fail(whole(key), msg.into());
            }
        }
        let m = &self.model;
        let checks: [(&str, bool, &str); 5] = [
            (
                "hidden",
                m.hidden.iter().all(|&w| (1..=65536).contains(&w)),
                "hidden layer widths must be between 1 and 65536",
            ),
            (
                "dropout",
                (0.0..1.0).contains(&m.dropout),
                "dropout must be in [0, 1)",
            ),
            (
                "l2",
                m.l2 >= 0.0 && m.l2.is_finite(),
                "l2 must be 0 or more",
            ),
            (
                "l1",
                m.l1 >= 0.0 && m.l1.is_finite(),
                "l1 must be 0 or more",
            ),
            (
                "init_scale",
                m.init_scale > 0.0 && m.init_scale.is_finite(),
                "init_scale must be a positive number",
            ),
        ];
        for (key, ok, msg) in checks {
            if !ok {
                return fail(whole(key), msg.into());
            }
        }
        let g = &self.gate;
        let checks: [(&str, bool, &str); 7] = [
            (
                "min_holdout_batches",
                g.min_holdout_batches >= 2,
                "min_holdout_batches must be at least 2: one batch says nothing about how days differ; 3 is the default",
            ),
            (
                "shift_alpha",
                g.shift_alpha > 0.0 && g.shift_alpha <= 0.5,
                "shift_alpha must be in (0, 0.5]; 0.01 is usual",
            ),
            (
                "suspect_alpha",
                g.suspect_alpha > 0.0 && g.suspect_alpha <= 0.5,
                "suspect_alpha must be in (0, 0.5]; 0.05 is usual",
            ),
            (
                "ridge_lambda",
                g.ridge_lambda > 0.0 && g.ridge_lambda.is_finite(),
                "ridge_lambda must be a number > 0; 1.0 suits standardised inputs",
            ),
            (
                "fresh_min_rows",
                g.fresh_min_rows >= 2,
                "fresh_min_rows must be at least 2 (a paired test needs two rows); 100 is usual",
            ),
            (
                "min_improvement",
                g.min_improvement >= 0.0 && g.min_improvement < 1.0,
                "min_improvement is relative: use a value in [0, 1), e.g. 0.01 for 1%",
            ),
            (
                "alpha",
                g.alpha > 0.0 && g.alpha <= 0.5,
                "alpha must be in (0, 0.5]: a one-sided test at a higher level can pass a worse model; 0.05 is usual",
            ),
        ];
        for (key, ok, msg) in checks {
            if !ok {
                return fail(whole(key), msg.into());
            }
        }
        if let Err(crate::drift::DriftError::BadThreshold { name, value }) =
            self.drift.rule().validate()
        {
            return fail(
                whole(name),
                format!(
                    "{name} = {value} is out of range: min_batches is at least 3, \
                     window is from min_batches to {}, threshold and spread_floor are above 0",
                    crate::drift::MAX_WINDOW
                ),
            );
        }
        if self.drift.max_reference_rows < 100 {
            return fail(
                whole("max_reference_rows"),
                "max_reference_rows must be at least 100".into(),
            );
        }
        let mb = self.memory.cycle_mb;
        if !(mb > 0.0 && mb.is_finite()) {
            return fail(
                whole("cycle_mb"),
                format!(
                    "cycle_mb = {mb} must be a positive number of MiB (the default is 1024); \
                     a cold candidate whose rows need more streams them from the store"
                ),
            );
        }
        let d = &self.daemon;
        if !(d.settle_seconds >= 0.0 && d.settle_seconds.is_finite()) {
            return fail(
                whole("settle_seconds"),
                "settle_seconds must be 0 or more".into(),
            );
        }
        if !(d.rescan_seconds >= 1.0 && d.rescan_seconds.is_finite()) {
            return fail(
                whole("rescan_seconds"),
                "rescan_seconds must be at least 1".into(),
            );
        }
        if let Some(at) = &d.train_at
            && parse_hh_mm(at).is_none()
        {
            return fail(
                whole("train_at"),
                format!("train_at {at:?} must be a time of day as \"HH:MM\" (24-hour)"),
            );
        }
        // Both HTTP endpoints: an IP address and port, loopback unless
        // exposing it was asked for (neither has authentication).
        let endpoints = [
            (
                "metrics_addr",
                &d.metrics_addr,
                d.metrics_allow_remote,
                "the endpoint",
                EXAMPLE_METRICS_ADDR,
            ),
            (
                "predict_addr",
                &d.predict_addr,
                d.predict_allow_remote,
                "the prediction endpoint",
                "127.0.0.1:9188",
            ),
        ];
        for (key, addr, allow_remote, what, example) in endpoints {
            let Some(addr) = addr else { continue };
            match addr.parse::<std::net::SocketAddr>() {
                Err(_) => {
                    return fail(
                        whole(key),
                        format!(
                            "{key} {addr:?} must be an IP address and port, such as {example:?}"
                        ),
                    );
                }
                Ok(a) if !a.ip().is_loopback() && !allow_remote => {
                    let allow = key.replace("_addr", "_allow_remote");
                    return fail(
                        whole(key),
                        format!(
                            "{key} {addr:?} is not a loopback address; {what} has no authentication, so use 127.0.0.1 or ::1 (or set {allow} = true to expose it anyway)"
                        ),
                    );
                }
                Ok(_) => {}
            }
        }
        if !(1..=100_000).contains(&d.predict_max_rows) {
            return fail(
                whole("predict_max_rows"),
                "predict_max_rows must be between 1 and 100000".into(),
            );
        }
        if !(1024..=256 * 1024 * 1024).contains(&d.predict_max_body_bytes) {
            return fail(
                whole("predict_max_body_bytes"),
                "predict_max_body_bytes must be between 1024 and 268435456 (256 MiB)".into(),
            );
        }
        if !(d.predict_timeout_seconds >= 0.1 && d.predict_timeout_seconds <= 3600.0) {
            return fail(
                whole("predict_timeout_seconds"),
                "predict_timeout_seconds must be between 0.1 and 3600".into(),
            );
        }
        if let Some(p) = &self.export.path {
            let name = p.file_name().map(|n| n.to_string_lossy().into_owned());
            let bad = p.as_os_str().is_empty()
                || p.to_string_lossy().ends_with('/')
                || name.as_deref().is_none_or(|n| n.starts_with('.'));
            if bad {
                return fail(
                    whole("path"),
                    format!(
                        "export path {:?} must name a file (not a folder or a dotfile), such as \"export/model.onnx\"",
                        p.display().to_string()
                    ),
                );
            }
        }
        Ok(())
    }

    /// A stable fingerprint of what the stored rows mean: column names,
    /// kinds, bounds, target, task and holdout fraction. A change here means
    /// the store and the config no longer agree.
    pub fn schema_fingerprint(&self) -> String {
        let mut h = blake3::Hasher::new();
        h.update(b"tidegate-schema-v1\0");
        h.update(self.data.target.get_ref().as_bytes());
        h.update(b"\0");
        h.update(self.data.task.to_string().as_bytes());
        h.update(&self.data.holdout_fraction.get_ref().to_le_bytes());
        for c in &self.data.columns {
            h.update(b"\0col\0");
            h.update(c.name.get_ref().as_bytes());
            h.update(b"\0");
            h.update(c.kind.to_string().as_bytes());
            h.update(&[u8::from(c.required)]);
            for b in [&c.min, &c.max] {
                match b {
                    Some(v) => {
                        h.update(&[1]);
                        h.update(&v.get_ref().to_le_bytes());
                    }
                    None => {
                        h.update(&[0]);
                    }
                }
            }
        }
        h.finalize().to_hex().to_string()
    }
}

/// Parses "HH:MM" (24-hour) into minutes after midnight.
pub fn parse_hh_mm(s: &str) -> Option<u32> {
    let (h, m) = s.split_once(':')?;
    if h.len() != 2 || m.len() != 2 {
        return None;
    }
    let h: u32 = h.parse().ok()?;
    let m: u32 = m.parse().ok()?;
    (h < 24 && m < 60).then_some(h * 60 + m)
}

/// 1-based line and column of a byte offset.
fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let offset = offset.min(text.len());
    let before = &text[..offset];
    let line = before.matches('\n').count() + 1;
    let col = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, col)
}

/// Byte span of the first `key =` at the start of a line, for messages about
/// plain (unspanned) values; the start of the file when the key is absent.
fn key_span(text: &str, key: &str) -> Range<usize> {
    let mut offset = 0;
    for line in text.split_inclusive('\n') {
        let trimmed = line.trim_start();
        if let Some(rest) = trimmed.strip_prefix(key)
            && rest.trim_start().starts_with('=')
        {
            let start = offset + (line.len() - trimmed.len());
            return start..start + key.len();
        }
        offset += line.len();
    }
    0..0
}

/// A commented config template for `tidegate init --template`.
pub const TEMPLATE: &str = include_str!("config_template.toml");

/// The metrics address the template, the docs and the messages show. The
/// port is outside 9100–9999 and the numbers above it where metrics
/// exporters are registered, is no well-known service's default, and is
/// below Linux's ephemeral range (32768–60999), so the kernel never hands it
/// to an outgoing connection: it collides with nothing a host commonly runs.
pub const EXAMPLE_METRICS_ADDR: &str = "127.0.0.1:23719";

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Config, ConfigError> {
        Config::parse(text, Path::new("t.toml"))
    }

    const MINIMAL: &str = r#"
[data]
target = "y"
task = "regression"

[[data.columns]]
name = "x"
kind = "number"

[[data.columns]]
name = "y"
kind = "number"
"#;

    fn err_at(text: &str) -> (usize, usize, String) {
        match parse(text) {
            Err(ConfigError::Invalid {
                line,
                column,
                message,
                ..
            }) => (line, column, message),
            other => panic!("expected an invalid-config error, got {other:?}"),
        }
    }

    #[test]
    fn old_drift_keys_still_load_and_change_nothing() {
        let old = format!(
            "{MINIMAL}\n[drift]\nks_alpha = 0.01\npsi_warn = 0.1\nmax_reference_rows = 5000\n"
        );
        let c = parse(&old).unwrap();
        assert_eq!(c.drift.ignored_keys(), vec!["ks_alpha", "psi_warn"]);
        assert_eq!(c.drift.rule(), crate::drift::Rule::default());
        assert_eq!(c.drift.max_reference_rows, 5000);
        // A bad new key is refused with its line.
        let bad = format!("{MINIMAL}\n[drift]\nwindow = 3\n");
        let e = parse(&bad).unwrap_err().to_string();
        assert!(e.contains("window"), "{e}");
    }

    #[test]
    fn minimal_config_gets_defaults() {
        let c = parse(MINIMAL).unwrap();
        assert_eq!(c.model.hidden, vec![64, 64]);
        assert_eq!(*c.data.holdout_fraction.get_ref(), 0.2);
        assert_eq!(c.training.backend, Backend::Flex);
        assert!(!c.gate.require_approval);
    }

    #[test]
    fn template_is_valid() {
        let c = parse(TEMPLATE).unwrap();
        assert_eq!(c.data.target.get_ref(), "loaves_sold");
    }

    #[test]
    fn export_path_must_name_a_file() {
        let with = |extra: &str| format!("{MINIMAL}\n[export]\n{extra}\n");
        let c = parse(&with("path = \"export/model.onnx\"")).unwrap();
        assert_eq!(c.export.path, Some(PathBuf::from("export/model.onnx")));
        assert_eq!(parse(MINIMAL).unwrap().export.path, None);
        for bad in ["\"\"", "\"export/\"", "\"export/.hidden\""] {
            let (line, _, msg) = err_at(&with(&format!("path = {bad}")));
            assert!(msg.contains("must name a file"), "{msg}");
            assert_eq!(line, MINIMAL.lines().count() + 3, "{bad}");
        }
    }

    #[test]
    fn metrics_address_must_be_loopback_unless_allowed() {
        let with = |extra: &str| format!("{MINIMAL}\n[daemon]\n{extra}\n");
        assert!(parse(&with(&format!("metrics_addr = {EXAMPLE_METRICS_ADDR:?}"))).is_ok());
        assert!(parse(&with("metrics_addr = \"[::1]:23719\"")).is_ok());
        let (_, _, msg) = err_at(&with("metrics_addr = \"0.0.0.0:23719\""));
        assert!(msg.contains("not a loopback address"), "{msg}");
        let (_, _, msg) = err_at(&with("metrics_addr = \"localhost\""));
        assert!(msg.contains("IP address and port"), "{msg}");
        let open = with("metrics_addr = \"0.0.0.0:23719\"\nmetrics_allow_remote = true");
        assert!(parse(&open).is_ok());
    }

    /// The `metrics_addr = "…"` addresses a text shows, in order.
    fn metrics_addrs(text: &str) -> Vec<&str> {
        text.split("metrics_addr = \"")
            .skip(1)
            .filter_map(|rest| rest.split('"').next())
            .collect()
    }

    #[test]
    fn the_example_metrics_address_is_the_documented_one_everywhere() {
        let operations = include_str!("../ops/OPERATIONS.md");
        let demo = include_str!("../demo-data/tidegate.toml");
        assert_eq!(metrics_addrs(TEMPLATE), vec![EXAMPLE_METRICS_ADDR]);
        assert_eq!(metrics_addrs(operations), vec![EXAMPLE_METRICS_ADDR]);
        // The demo's config is the template, byte for byte.
        assert_eq!(demo, TEMPLATE);
        // The port a database's metrics exporter listens on by default, used
        // here before: nothing should still show it.
        let readme = include_str!("../README.md");
        for (name, text) in [
            ("template", TEMPLATE),
            ("OPERATIONS.md", operations),
            ("README.md", readme),
        ] {
            assert!(!text.contains(":9187"), "{name} still shows port 9187");
        }
        let port: u16 = EXAMPLE_METRICS_ADDR
            .rsplit(':')
            .next()
            .and_then(|p| p.parse().ok())
            .expect("the example has a port");
        // Exporters are registered from 9100 upwards (common practice, no
        // source); the ephemeral range is Linux's default
        // net.ipv4.ip_local_port_range (from memory).
        assert!(!(9100..=9999).contains(&port) && port < 32768, "{port}");
    }

    #[test]
    fn prediction_endpoint_is_off_by_default_and_loopback_unless_allowed() {
        let d = parse(MINIMAL).unwrap().daemon;
        assert_eq!(d.predict_addr, None);
        assert!(!d.predict_allow_remote);
        let with = |extra: &str| format!("{MINIMAL}\n[daemon]\n{extra}\n");
        assert!(parse(&with("predict_addr = \"127.0.0.1:9188\"")).is_ok());
        assert!(parse(&with("predict_addr = \"[::1]:9188\"")).is_ok());
        let (line, _, msg) = err_at(&with("predict_addr = \"0.0.0.0:9188\""));
        assert!(msg.contains("not a loopback address"), "{msg}");
        assert!(msg.contains("predict_allow_remote"), "{msg}");
        assert!(line > 1, "{line}");
        let (_, _, msg) = err_at(&with("predict_addr = \"localhost\""));
        assert!(msg.contains("IP address and port"), "{msg}");
        let open = with("predict_addr = \"0.0.0.0:9188\"\npredict_allow_remote = true");
        assert!(parse(&open).is_ok());
        // Allowing metrics off loopback does not allow predictions.
        let (_, _, msg) = err_at(&with(
            "predict_addr = \"0.0.0.0:9188\"\nmetrics_allow_remote = true",
        ));
        assert!(msg.contains("predict_allow_remote"), "{msg}");
        for bad in [
            "predict_max_rows = 0",
            "predict_max_body_bytes = 10",
            "predict_timeout_seconds = 0.0",
        ] {
            let (_, _, msg) = err_at(&with(bad));
            let key = bad.split(' ').next().unwrap();
            assert!(msg.contains(key), "{bad}: {msg}");
        }
    }

    #[test]
    fn unknown_key_points_at_its_line() {
        let text = MINIMAL.replace(
            "task = \"regression\"",
            "task = \"regression\"\ntargte = \"y\"",
        );
        let (line, col, msg) = err_at(&text);
        assert_eq!((line, col), (5, 1), "{msg}");
        assert!(msg.contains("targte"), "{msg}");
    }

    #[test]
    fn bad_enum_value_says_what_is_allowed() {
        let text = MINIMAL.replace(
            "kind = \"number\"\n\n[[data.columns]]\nname = \"y\"",
            "kind = \"text\"\n\n[[data.columns]]\nname = \"y\"",
        );
        let (line, _, msg) = err_at(&text);
        assert_eq!(line, 8);
        assert!(msg.contains("number") && msg.contains("category"), "{msg}");
    }

    #[test]
    fn target_must_be_a_column() {
        let text = MINIMAL.replace("target = \"y\"", "target = \"z\"");
        let (line, col, msg) = err_at(&text);
        assert_eq!((line, col), (3, 10));
        assert!(msg.contains("allowed: x, y"), "{msg}");
    }

    #[test]
    fn duplicate_column_is_refused() {
        let text = MINIMAL.replace("name = \"x\"", "name = \"y\"");
        let (line, _, msg) = err_at(&text);
        assert_eq!(line, 11);
        assert!(msg.contains("twice"), "{msg}");
    }

    #[test]
    fn reserved_column_names_are_refused() {
        for reserved in crate::rowfile::RESERVED {
            let text = MINIMAL.replace("name = \"x\"", &format!("name = \"{reserved}\""));
            let (line, col, msg) = err_at(&text);
            assert_eq!((line, col), (7, 8), "{msg}");
            assert!(msg.contains("reserved"), "{msg}");
        }
    }

    #[test]
    fn classification_needs_category_target() {
        let text = MINIMAL.replace("task = \"regression\"", "task = \"classification\"");
        let (_, _, msg) = err_at(&text);
        assert!(msg.contains("kind category"), "{msg}");
    }

    #[test]
    fn plain_values_are_located_by_key() {
        let text = format!("{MINIMAL}\n[training]\nbatch_size = 0\n");
        let (line, col, msg) = err_at(&text);
        assert_eq!((line, col), (15, 1));
        assert!(msg.contains("batch_size"), "{msg}");
    }

    #[test]
    fn holdout_fraction_bounds() {
        let text = MINIMAL.replace(
            "task = \"regression\"",
            "task = \"regression\"\nholdout_fraction = 1.5",
        );
        let (line, col, _) = err_at(&text);
        assert_eq!((line, col), (5, 20));
    }

    #[test]
    fn fingerprint_changes_with_schema_only() {
        let a = parse(MINIMAL).unwrap();
        let b = parse(&format!("{MINIMAL}\n[training]\nseed = 7\n")).unwrap();
        assert_eq!(a.schema_fingerprint(), b.schema_fingerprint());
        let c = parse(&MINIMAL.replace("name = \"x\"", "name = \"x2\"")).unwrap();
        assert_ne!(a.schema_fingerprint(), c.schema_fingerprint());
    }

    #[test]
    fn hh_mm() {
        assert_eq!(parse_hh_mm("02:30"), Some(150));
        assert_eq!(parse_hh_mm("24:00"), None);
        assert_eq!(parse_hh_mm("2:30"), None);
    }
}
