//! The audit log: event types, the hash chain, the `audit.jsonl` mirror,
//! query filters and chain verification.
//!
//! Each entry is one JSON object on one line. Its `hash` is the blake3 of
//! the entry's canonical JSON without the `hash` field (keys sorted, no
//! spaces), and that JSON includes `prev`, the hash of the entry before, so
//! editing, deleting, inserting or reordering any entry breaks the chain
//! from that point on. The chain logic is pure; only `Mirror` touches disk.

use std::collections::BTreeMap;
use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use chrono::{DateTime, SecondsFormat, Utc};
use serde::{Deserialize, Serialize};

use crate::ids::{AuditSeq, BatchId, ModelId};

/// `prev` of the first entry.
pub const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// Most new category values one `batch-accepted` entry lists per column:
/// an entry must stay far below sled's blob threshold (a batch with 20,000
/// new values listed them in 300 KiB), and the rest are in the vocabulary.
pub const NEW_VALUES_LISTED: usize = 100;

/// What happened.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Event {
    /// The state dir was created.
    Initialized {
        schema_fingerprint: String,
        config_hash: String,
        columns: Vec<String>,
        target: String,
        task: String,
    },
    /// A file was stored as a batch.
    BatchAccepted {
        batch: BatchId,
        file: String,
        file_hash: String,
        rows: u64,
        train_rows: u64,
        holdout_rows: u64,
        /// Category values seen for the first time, per column, in the
        /// order first seen: all of them, or the first
        /// [`NEW_VALUES_LISTED`] when there are more.
        #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
        new_categories: BTreeMap<String, Vec<String>>,
        /// How many values were new, for each column whose list above was
        /// cut. The full list is the column's vocabulary: its codes from
        /// (vocabulary size before the batch) on, written in the same
        /// transaction as this entry.
        #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
        new_category_counts: BTreeMap<String, u64>,
        /// Each column against the stored training rows (absent for the
        /// first batch).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        drift: Option<crate::drift::BatchReport>,
        /// The suspect-batch check (absent before it existed, and for the
        /// first batch, which nothing can be compared with). A suspect
        /// batch is stored and set aside in this same entry.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        suspect: Option<SuspectEvidence>,
        /// The batch's row file, written before this entry (absent in
        /// entries from before rows were kept in files; their rows were
        /// moved to a file later, under a `rows-written` entry).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        rows_file: Option<crate::rowfile::FileRef>,
    },
    /// A stored batch's rows were written to a new row file: when a store
    /// from before row files is upgraded, or when a schema migration
    /// rewrites every batch. The file named here replaces any earlier one.
    RowsWritten {
        batch: BatchId,
        rows_file: crate::rowfile::FileRef,
        reason: String,
    },
    /// An operator set a stored batch aside: its rows stay stored and
    /// archived, and nothing reads them until it is brought back.
    BatchSetAside { batch: BatchId, reason: String },
    /// An operator brought a batch that was set aside back into use.
    BatchBroughtBack { batch: BatchId, reason: String },
    /// A file was refused; nothing from it was stored. (Logs written
    /// before the name was settled call it `batch-rejected`.)
    #[serde(alias = "batch-rejected")]
    BatchRefused {
        file: String,
        file_hash: String,
        problems: u64,
        first_problem: String,
        /// Where the refused file and its reasons were put, relative to the state dir.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        kept_as: Option<String>,
    },
    /// A file with the same bytes as an accepted batch; nothing stored twice.
    BatchDuplicate {
        file: String,
        file_hash: String,
        duplicate_of: BatchId,
    },
    /// A retrain cycle began.
    CycleStarted {
        cycle: u64,
        serving: Option<ModelId>,
        /// Batches the serving model has not been trained on.
        new_batches: Vec<BatchId>,
        /// Candidate kinds to train ("warm", "cold").
        candidates: Vec<String>,
    },
    /// A candidate finished training and was scored on the holdout rows.
    CandidateTrained {
        cycle: u64,
        model: ModelId,
        /// "warm" or "cold".
        run: String,
        parent: Option<ModelId>,
        trained_through: BatchId,
        epochs: usize,
        #[serde(with = "number")]
        seconds: f64,
        stop: String,
        holdout_rows: usize,
        #[serde(with = "number")]
        holdout_loss: f64,
        /// blake3 of the checkpoint's manifest.json (which holds the other files' hashes).
        manifest_hash: String,
        /// Inputs a warm candidate's first layer gained, per category column,
        /// for values that arrived since its parent was trained.
        #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
        widened: BTreeMap<String, usize>,
        /// Number columns whose standardisation a warm candidate's parent
        /// refreshed (folded into its first layer) before training.
        #[serde(default, skip_serializing_if = "Vec::is_empty")]
        rescaled: Vec<String>,
    },
    /// The cycle's reference models, fitted on the same training rows as
    /// the candidates and scored on the same holdout rows.
    BaselinesScored {
        cycle: u64,
        holdout_rows: usize,
        /// Mean holdout loss of the training mean / class frequencies.
        #[serde(with = "number")]
        trivial_loss: f64,
        /// Mean holdout loss of ridge regression on the encoded inputs;
        /// absent when it could not be fitted (`ridge_problem` says why).
        #[serde(default, with = "maybe_number")]
        ridge_loss: Option<f64>,
        #[serde(with = "number")]
        ridge_lambda: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        ridge_problem: Option<String>,
        /// The serving model's mean loss on the same rows.
        serving: Option<ModelId>,
        #[serde(default, with = "maybe_number")]
        serving_loss: Option<f64>,
        /// Mean holdout loss of the boosted trees (`trees`), fitted on a
        /// sample of the same training rows; absent in entries written
        /// before they existed, and when they could not be fitted
        /// (`trees_problem` says why).
        #[serde(
            default,
            skip_serializing_if = "Option::is_none",
            with = "maybe_number"
        )]
        trees_loss: Option<f64>,
        /// Training rows the trees were fitted on (the sample).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        trees_rows: Option<usize>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        trees_problem: Option<String>,
        /// For each network scored on these rows (candidates and the
        /// serving model), how clearly the trees do better.
        #[serde(default, skip_serializing_if = "Vec::is_empty")]
        trees_versus: Vec<TreesVersus>,
    },
    /// A cycle that started was cut short (crash, kill, cancel); the serving
    /// model was not changed by it.
    CycleAbandoned { cycle: u64 },
    /// The config's columns changed and every stored row was rewritten for
    /// the new schema; no model serves until a cold candidate is promoted.
    SchemaMigrated {
        from_fingerprint: String,
        to_fingerprint: String,
        added: Vec<String>,
        removed: Vec<String>,
        changed: Vec<String>,
        previous_serving: Option<ModelId>,
        config_hash: String,
        reason: String,
    },
    /// A consistent copy of the state dir was written to `out`.
    BackupMade {
        out: String,
        batches: u64,
        rows: u64,
    },
    /// This state dir was restored from a backup; entries up to
    /// `backup_seq` came with it.
    Restored {
        from: String,
        backup_created_at: String,
        backup_seq: u64,
    },
    /// An accepted batch was scored by the serving model (and by the model
    /// it replaced) before anything trained on it.
    FreshChecked { check: FreshEvidence },
    /// A candidate became the serving model.
    Promoted {
        cycle: u64,
        model: ModelId,
        previous: Option<ModelId>,
        evidence: GateEvidence,
    },
    /// The candidate did not become the serving model and stays on disk,
    /// unused (the gate kept the model that served). Logs written before
    /// the name was settled call it `kept`.
    #[serde(alias = "kept")]
    Shelved {
        cycle: u64,
        model: ModelId,
        serving: Option<ModelId>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        evidence: Option<GateEvidence>,
        reason: String,
    },
    /// The candidate won the gate and waits for a person's decision.
    AwaitingApproval {
        cycle: u64,
        model: ModelId,
        serving: Option<ModelId>,
        evidence: GateEvidence,
    },
    /// A person let a waiting candidate serve.
    Approved {
        model: ModelId,
        previous: Option<ModelId>,
        reason: String,
    },
    /// A person turned a waiting candidate down; it stays on disk.
    Declined { model: ModelId, reason: String },
    /// An earlier model serves again.
    RolledBack {
        from: ModelId,
        to: ModelId,
        /// "manual" or "automatic".
        how: String,
        reason: String,
        /// The fresh-data check behind an automatic rollback.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        evidence: Option<FreshEvidence>,
    },
    /// Refused files written by a version that kept them under another
    /// folder name were moved to the folder refused files are written to
    /// now. Entries before this one name the old folder in `kept_as`; the
    /// same file name is now under `to`.
    FolderRenamed {
        from: String,
        to: String,
        files: u64,
    },
    /// The model that now serves was written to the configured ONNX export
    /// file (right after the entry that made it serve).
    ModelExported {
        model: ModelId,
        /// The export file's path (a relative configured path joined to the state dir).
        file: String,
        /// blake3 of the ONNX file written.
        onnx_hash: String,
        /// blake3 of the checkpoint's manifest.json it was built from.
        checkpoint_manifest_hash: String,
        opset: i64,
    },
}

/// The suspect-batch check's findings as written in the batch's entry.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SuspectEvidence {
    /// The batch was found suspect and set aside.
    pub suspect: bool,
    /// What made it suspect, short (empty when it is not).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub why: Vec<String>,
    /// Rows the pairing was judged on (rows with a new category value or
    /// no target are left out).
    pub rows: usize,
    /// One judgement per reference model.
    pub references: Vec<SuspectReference>,
    /// Batch target root mean square / the stored rows' (regression).
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub target_scale: Option<f64>,
    /// Share of the batch's rows that are copies of its most common row.
    #[serde(with = "number")]
    pub copies_share: f64,
    /// Every check's figures in words.
    pub reason: String,
}

/// One reference model's pairing judgement on a batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SuspectReference {
    /// "serving m000004", "predecessor m000003" or "ridge".
    pub name: String,
    /// "related", "unrelated" or "cannot-tell".
    pub verdict: String,
    /// Share of the shuffled-target loss the rows' own targets save.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub explained: Option<f64>,
    /// The same on earlier batches (median).
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub usual_explained: Option<f64>,
    /// ln(mean batch loss / mean holdout loss).
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub level: Option<f64>,
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub p: Option<f64>,
    pub history: usize,
}

/// The boosted trees against one network on a cycle's holdout rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TreesVersus {
    pub model: ModelId,
    /// The network's mean loss on the same holdout rows.
    #[serde(with = "number")]
    pub loss: f64,
    /// One-sided p that the trees' mean per-row loss is below the
    /// network's, batches as clusters (`trees::p_lower`); absent with
    /// fewer than two batches.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub p: Option<f64>,
}

impl TreesVersus {
    /// The network of a `baselines-scored` entry that the trees' advice is
    /// judged against: the lowest mean loss (`trees::best_network`).
    pub fn best(versus: &[TreesVersus]) -> Option<&TreesVersus> {
        crate::trees::best_network(versus.iter().map(|v| v.loss)).map(|i| &versus[i])
    }

    /// The advice of a `baselines-scored` entry: the best network and how
    /// much better the trees do, when worth telling (`trees::advice`).
    pub fn advice(trees_loss: f64, versus: &[TreesVersus]) -> Option<(ModelId, f64)> {
        let best = TreesVersus::best(versus)?;
        crate::trees::advice(best.loss, trees_loss, best.p).map(|share| (best.model, share))
    }
}

/// The fresh-data check's numbers as written in the log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FreshEvidence {
    pub batch: BatchId,
    /// Rows of the batch scored (training and holdout side: no model has
    /// trained on either yet).
    pub rows: usize,
    pub serving: ModelId,
    /// "regressed", "shifted", "new-conditions", "steady" or "untested".
    pub verdict: String,
    /// Rows the tests used: the batch's rows less those with a category
    /// value the serving model (or its predecessor) has never seen.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tested_rows: Option<usize>,
    /// Category values neither model has seen, per column, and the rows
    /// carrying them: new conditions, reported, never tested.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub new_conditions: BTreeMap<String, Vec<String>>,
    #[serde(default, skip_serializing_if = "is_zero")]
    pub new_condition_rows: usize,
    /// ln(mean batch loss / mean holdout loss) of the serving model, and the
    /// prediction-interval p against earlier batches' levels.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub level: Option<f64>,
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub p_level: Option<f64>,
    /// Earlier batches the level was compared with.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub level_history: usize,
    /// Category values whose loss rose far beyond the rest of their column
    /// on this batch ("column = value").
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub shifted_values: Vec<String>,
    /// Evidence that the serving model is worse than its predecessor,
    /// gathered over this and earlier batches of its service, the evidence
    /// a rollback needs (1 / alpha), and the batches it rests on.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub evidence: Option<f64>,
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub evidence_needed: Option<f64>,
    #[serde(default, skip_serializing_if = "is_zero")]
    pub monitored_batches: usize,
    #[serde(default, with = "maybe_number")]
    pub mean_loss_serving: Option<f64>,
    /// The serving model's mean loss on the stored holdout rows.
    #[serde(default, with = "maybe_number")]
    pub mean_loss_reference: Option<f64>,
    /// One-sided Welch p that the fresh rows cost the serving model more
    /// (written by versions that tested rows as independent; now absent).
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub p_shift: Option<f64>,
    /// The model the serving one replaced by promotion or approval.
    pub previous: Option<ModelId>,
    #[serde(default, with = "maybe_number")]
    pub mean_loss_previous: Option<f64>,
    /// Paired t of serving − previous losses, and its one-sided p (written
    /// by versions that tested rows as independent; now absent).
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub t: Option<f64>,
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub p_regression: Option<f64>,
    /// Category values whose rows carry the most loss above the reference.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub hotspots: Vec<Hotspot>,
    pub reason: String,
}

/// Rows of a batch sharing one category value, and how much loss above the
/// serving model's usual level they carry.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Hotspot {
    pub column: String,
    pub value: String,
    pub rows: usize,
    #[serde(with = "number")]
    pub mean_loss: f64,
    /// Mean loss on stored holdout rows with the same value.
    #[serde(with = "number")]
    pub usual_loss: f64,
    /// Σ (row loss − usual loss) over these rows.
    #[serde(with = "number")]
    pub excess_loss: f64,
}

impl std::fmt::Display for Hotspot {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{} = {}: mean loss {:.4} on {} rows (usually {:.4})",
            self.column, self.value, self.mean_loss, self.rows, self.usual_loss
        )
    }
}

fn is_zero(n: &usize) -> bool {
    *n == 0
}

/// The gate's numbers as written in the log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GateEvidence {
    /// What the candidate was compared with: "serving" or "trivial".
    /// (Logs written before the name was settled call it `baseline`, a word
    /// now kept for the reference models of `baselines-scored`.)
    #[serde(alias = "baseline")]
    pub compared_with: String,
    pub rows: usize,
    /// Mean holdout loss of the model the candidate was compared with.
    #[serde(with = "number", alias = "mean_loss_baseline")]
    pub mean_loss_compared_with: f64,
    #[serde(with = "number")]
    pub mean_loss_candidate: f64,
    #[serde(default, with = "maybe_number")]
    pub relative_improvement: Option<f64>,
    /// Paired t statistic; absent when it is infinite (all differences equal).
    #[serde(default, with = "maybe_number")]
    pub t: Option<f64>,
    /// One-sided p-value that the candidate is better (after Holm's
    /// correction when several candidates were judged).
    #[serde(with = "number")]
    pub p: f64,
    /// Batches the holdout rows came from (the test's clusters), and the
    /// batches a decision needs.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub batches: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub batches_needed: Option<usize>,
    /// Candidates judged together, and the candidate's own p before Holm.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub candidates: Option<usize>,
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub p_unadjusted: Option<f64>,
    /// Wilcoxon signed-rank one-sided p, recorded beside the t-test's.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "maybe_number"
    )]
    pub wilcoxon_p: Option<f64>,
    pub new_rows: usize,
    pub old_rows: usize,
    pub reason: String,
}

impl GateEvidence {
    /// Evidence for a move that no test decided: a state built on purpose
    /// by a simulation, a benchmark or a test. Compared with the serving
    /// model on `rows` holdout rows; no statistic, p = 1.
    pub fn without_test(rows: usize, before: f64, after: f64, reason: String) -> GateEvidence {
        GateEvidence {
            compared_with: "serving".into(),
            rows,
            mean_loss_compared_with: before,
            mean_loss_candidate: after,
            relative_improvement: (before > 0.0).then(|| (before - after) / before),
            t: None,
            p: 1.0,
            batches: None,
            batches_needed: None,
            candidates: None,
            p_unadjusted: None,
            wilcoxon_p: None,
            new_rows: 0,
            old_rows: rows,
            reason,
        }
    }
}

impl Event {
    /// The kebab-case kind name as written in the log.
    pub fn kind(&self) -> &'static str {
        match self {
            Event::Initialized { .. } => "initialized",
            Event::BatchAccepted { .. } => "batch-accepted",
            Event::BatchSetAside { .. } => "batch-set-aside",
            Event::BatchBroughtBack { .. } => "batch-brought-back",
            Event::BatchRefused { .. } => "batch-refused",
            Event::BatchDuplicate { .. } => "batch-duplicate",
            Event::CycleStarted { .. } => "cycle-started",
            Event::CandidateTrained { .. } => "candidate-trained",
            Event::BaselinesScored { .. } => "baselines-scored",
            Event::CycleAbandoned { .. } => "cycle-abandoned",
            Event::FreshChecked { .. } => "fresh-checked",
            Event::BackupMade { .. } => "backup-made",
            Event::SchemaMigrated { .. } => "schema-migrated",
            Event::Restored { .. } => "restored",
            Event::Promoted { .. } => "promoted",
            Event::Shelved { .. } => "shelved",
            Event::AwaitingApproval { .. } => "awaiting-approval",
            Event::Approved { .. } => "approved",
            Event::Declined { .. } => "declined",
            Event::RolledBack { .. } => "rolled-back",
            Event::ModelExported { .. } => "model-exported",
            Event::FolderRenamed { .. } => "folder-renamed",
            Event::RowsWritten { .. } => "rows-written",
        }
    }

    /// Every kind name, for `log --kind` validation.
    pub const KINDS: &'static [&'static str] = &[
        "initialized",
        "batch-accepted",
        "batch-set-aside",
        "batch-brought-back",
        "batch-refused",
        "batch-duplicate",
        "cycle-started",
        "candidate-trained",
        "baselines-scored",
        "cycle-abandoned",
        "fresh-checked",
        "backup-made",
        "restored",
        "schema-migrated",
        "promoted",
        "shelved",
        "awaiting-approval",
        "approved",
        "declined",
        "rolled-back",
        "model-exported",
        "folder-renamed",
        "rows-written",
    ];

    /// Kind names that older versions wrote, and what they are called now:
    /// old logs read as the new kinds, and `log --kind` takes either.
    pub const FORMER_KINDS: &'static [(&'static str, &'static str)] =
        &[("batch-rejected", "batch-refused"), ("kept", "shelved")];
    /// The serving pointer's move this event records, if any: the model
    /// that serves from now, the one that served before it, and whether it
    /// came back by a rollback (rather than a promotion or an approval).
    pub fn arrival(&self) -> Option<(ModelId, Option<ModelId>, bool)> {
        match self {
            Event::Promoted {
                model, previous, ..
            }
            | Event::Approved {
                model, previous, ..
            } => Some((*model, *previous, false)),
            Event::RolledBack { from, to, .. } => Some((*to, Some(*from), true)),
            _ => None,
        }
    }

    /// The model an event is about, if any.
    pub fn model(&self) -> Option<ModelId> {
        match self {
            Event::CandidateTrained { model, .. }
            | Event::Promoted { model, .. }
            | Event::Shelved { model, .. }
            | Event::AwaitingApproval { model, .. }
            | Event::Approved { model, .. }
            | Event::Declined { model, .. }
            | Event::ModelExported { model, .. } => Some(*model),
            Event::RolledBack { to, .. } => Some(*to),
            Event::FreshChecked { check } => Some(check.serving),
            _ => None,
        }
    }

    /// The batch an event is about, if any.
    pub fn batch(&self) -> Option<BatchId> {
        match self {
            Event::BatchAccepted { batch, .. }
            | Event::BatchSetAside { batch, .. }
            | Event::BatchBroughtBack { batch, .. }
            | Event::RowsWritten { batch, .. } => Some(*batch),
            Event::BatchDuplicate { duplicate_of, .. } => Some(*duplicate_of),
            Event::FreshChecked { check } => Some(check.batch),
            _ => None,
        }
    }

    /// One line saying what happened, for tables.
    pub fn summary(&self) -> String {
        match self {
            Event::Initialized {
                target,
                task,
                columns,
                ..
            } => {
                format!(
                    "state created: {task} of {target} from {} columns",
                    columns.len()
                )
            }
            Event::BatchAccepted {
                batch,
                file,
                rows,
                train_rows,
                holdout_rows,
                new_categories,
                new_category_counts,
                drift,
                suspect,
                ..
            } => {
                let mut s = format!(
                    "{batch} from {file}: {rows} rows ({train_rows} train, {holdout_rows} holdout)"
                );
                for (col, values) in new_categories {
                    s.push_str(&format!("; new {col}: {}", values.join(", ")));
                    if let Some(n) = new_category_counts.get(col) {
                        let more = n.saturating_sub(values.len() as u64);
                        s.push_str(&format!(" and {more} more ({n} new values)"));
                    }
                }
                if let Some(line) = drift.as_ref().and_then(|d| d.summary()) {
                    s.push_str(&format!("; {line}"));
                }
                if let Some(sus) = suspect.as_ref().filter(|x| x.suspect) {
                    s.push_str(&format!("; SUSPECT, set aside: {}", sus.why.join("; ")));
                }
                s
            }
            Event::BatchSetAside { batch, reason } => {
                format!("{batch} set aside by hand: {reason}")
            }
            Event::BatchBroughtBack { batch, reason } => {
                format!("{batch} brought back into use: {reason}")
            }
            Event::BatchRefused {
                file,
                problems,
                first_problem,
                ..
            } => {
                format!(
                    "{file} refused ({problems} problem{}): {first_problem}",
                    if *problems == 1 { "" } else { "s" }
                )
            }
            Event::BatchDuplicate {
                file, duplicate_of, ..
            } => format!("{file} is a duplicate of batch {duplicate_of}; nothing stored"),
            Event::CycleStarted {
                cycle,
                serving,
                new_batches,
                candidates,
            } => format!(
                "cycle {cycle}: {} candidate(s) against {}, {} new batch(es)",
                candidates.join(" + "),
                serving.map_or_else(|| "the trivial predictor".to_string(), |m| m.to_string()),
                new_batches.len()
            ),
            Event::CandidateTrained {
                model,
                run,
                epochs,
                seconds,
                holdout_loss,
                widened,
                rescaled,
                ..
            } => {
                let mut s = format!(
                    "{model} ({run}): {epochs} epochs in {seconds:.1} s, holdout loss {holdout_loss:.4}"
                );
                for (col, n) in widened {
                    s.push_str(&format!("; {n} new {col} input(s)"));
                }
                if !rescaled.is_empty() {
                    s.push_str(&format!("; rescaled {}", rescaled.join(", ")));
                }
                s
            }
            Event::Promoted {
                model,
                previous,
                evidence,
                ..
            } => format!(
                "{model} serves (was {}): {}",
                previous.map_or_else(|| "none".to_string(), |m| m.to_string()),
                evidence.reason
            ),
            Event::BaselinesScored {
                cycle,
                trivial_loss,
                ridge_loss,
                ridge_problem,
                serving,
                serving_loss,
                trees_loss,
                trees_problem,
                trees_versus,
                ..
            } => {
                let ridge = match (ridge_loss, ridge_problem) {
                    (Some(r), _) => format!("ridge {r:.4}"),
                    (None, Some(p)) => format!("ridge not fitted ({p})"),
                    (None, None) => "ridge not fitted".to_string(),
                };
                // Entries from before the trees existed have neither field
                // and say nothing about them.
                let trees = match (trees_loss, trees_problem) {
                    (Some(t), _) => format!(", trees {t:.4}"),
                    (None, Some(p)) => format!(", trees not fitted ({p})"),
                    (None, None) => String::new(),
                };
                let mut s =
                    format!("cycle {cycle} baselines: {ridge}{trees}, trivial {trivial_loss:.4}");
                if let (Some(m), Some(l)) = (serving, serving_loss) {
                    s.push_str(&format!("; serving {m} {l:.4}"));
                    if let Some(r) = ridge_loss
                        && l >= r
                    {
                        s.push_str(" (does not beat ridge)");
                    }
                }
                if let Some(t) = trees_loss
                    && let Some((best, share)) = TreesVersus::advice(*t, trees_versus)
                {
                    s.push_str(&format!(
                        "; boosted trees do {:.0}% better than the best network ({best})",
                        100.0 * share,
                    ));
                }
                s
            }
            Event::FreshChecked { check } => {
                let mut s = format!(
                    "{} fresh check of {}: {}; {}",
                    check.batch, check.serving, check.verdict, check.reason
                );
                if !check.hotspots.is_empty() {
                    let list: Vec<String> = check.hotspots.iter().map(|h| h.to_string()).collect();
                    s.push_str(&format!("; most excess loss in {}", list.join("; ")));
                }
                s
            }
            Event::SchemaMigrated {
                added,
                removed,
                changed,
                previous_serving,
                reason,
                ..
            } => {
                let list = |v: &Vec<String>| {
                    if v.is_empty() {
                        "none".to_string()
                    } else {
                        v.join(", ")
                    }
                };
                format!(
                    "schema migrated (added {}; removed {}; changed {}); {} no longer serves, a cold candidate comes next: {reason}",
                    list(added),
                    list(removed),
                    list(changed),
                    previous_serving.map_or_else(|| "no model".to_string(), |m| m.to_string())
                )
            }
            Event::BackupMade { out, batches, rows } => {
                format!("backup of {batches} batches ({rows} rows) written to {out}")
            }
            Event::Restored {
                from,
                backup_created_at,
                backup_seq,
            } => format!(
                "restored from {from} (backup of {backup_created_at}, entries up to #{backup_seq})"
            ),
            Event::CycleAbandoned { cycle } => {
                format!("cycle {cycle} was cut short; the serving model did not change")
            }
            Event::Shelved {
                model,
                serving,
                reason,
                ..
            } => format!(
                "{model} shelved ({}): {}",
                serving.map_or_else(
                    || "no model serves".to_string(),
                    |m| format!("{m} still serves")
                ),
                reason.strip_prefix("keep: ").unwrap_or(reason)
            ),
            Event::AwaitingApproval {
                model, evidence, ..
            } => {
                format!(
                    "{model} won the gate and awaits approval: {}",
                    evidence.reason
                )
            }
            Event::Approved {
                model,
                previous,
                reason,
            } => format!(
                "{model} approved and serves (was {}): {reason}",
                previous.map_or_else(|| "none".to_string(), |m| m.to_string())
            ),
            Event::Declined { model, reason } => format!("{model} declined: {reason}"),
            Event::ModelExported {
                model,
                file,
                onnx_hash,
                ..
            } => format!(
                "{model} exported to {file} (ONNX, blake3 {})",
                &onnx_hash[..onnx_hash.len().min(12)]
            ),
            Event::RolledBack {
                from,
                to,
                how,
                reason,
                ..
            } => {
                format!("{to} serves again instead of {from} ({how}): {reason}")
            }
            Event::RowsWritten {
                batch,
                rows_file,
                reason,
            } => format!(
                "rows of {batch} written to rows/{} ({} bytes): {reason}",
                rows_file.name, rows_file.bytes
            ),
            Event::FolderRenamed { from, to, files } => format!(
                "{from}/ renamed to {to}/ ({files} file{}); earlier entries' {from}/ paths are now under {to}/",
                if *files == 1 { "" } else { "s" }
            ),
        }
    }
}

/// How a number that is not finite is written: JSON has no NaN or
/// infinity (serde_json would write `null`, which no `f64` field reads
/// back). So a non-finite number in an audit field is written as one of
/// these strings, and read back as the same value. A `null` where a number
/// belongs (written before this rule) reads as NaN, so older logs still
/// parse; the chain hashes the line as written, so they still verify.
pub const NOT_A_NUMBER: &str = "NaN";
pub const PLUS_INFINITY: &str = "inf";
pub const MINUS_INFINITY: &str = "-inf";

fn marker(x: f64) -> &'static str {
    if x.is_nan() {
        NOT_A_NUMBER
    } else if x > 0.0 {
        PLUS_INFINITY
    } else {
        MINUS_INFINITY
    }
}

/// Reads a number, a marker string, or `null` (NaN); see [`NOT_A_NUMBER`].
struct NumberVisitor;

impl<'de> serde::de::Visitor<'de> for NumberVisitor {
    type Value = Option<f64>;

    fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "a number, \"{NOT_A_NUMBER}\", \"{PLUS_INFINITY}\", \"{MINUS_INFINITY}\" or null"
        )
    }
    fn visit_f64<E: serde::de::Error>(self, v: f64) -> Result<Self::Value, E> {
        Ok(Some(v))
    }
    fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<Self::Value, E> {
        Ok(Some(v as f64))
    }
    fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<Self::Value, E> {
        Ok(Some(v as f64))
    }
    fn visit_str<E: serde::de::Error>(self, v: &str) -> Result<Self::Value, E> {
        match v {
            NOT_A_NUMBER => Ok(Some(f64::NAN)),
            PLUS_INFINITY => Ok(Some(f64::INFINITY)),
            MINUS_INFINITY => Ok(Some(f64::NEG_INFINITY)),
            _ => Err(E::invalid_value(serde::de::Unexpected::Str(v), &self)),
        }
    }
    fn visit_unit<E: serde::de::Error>(self) -> Result<Self::Value, E> {
        Ok(None)
    }
    fn visit_none<E: serde::de::Error>(self) -> Result<Self::Value, E> {
        Ok(None)
    }
    fn visit_some<D: serde::Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
        d.deserialize_any(NumberVisitor)
    }
}

/// `#[serde(with)]` for an `f64` audit field.
mod number {
    use serde::{Deserializer, Serializer};

    pub fn serialize<S: Serializer>(x: &f64, s: S) -> Result<S::Ok, S::Error> {
        if x.is_finite() {
            s.serialize_f64(*x)
        } else {
            s.serialize_str(super::marker(*x))
        }
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
        Ok(d.deserialize_any(super::NumberVisitor)?.unwrap_or(f64::NAN))
    }
}

/// `#[serde(with)]` for an `Option<f64>` audit field (`null` is `None`).
mod maybe_number {
    use serde::{Deserializer, Serializer};

    pub fn serialize<S: Serializer>(x: &Option<f64>, s: S) -> Result<S::Ok, S::Error> {
        match x {
            Some(x) => super::number::serialize(x, s),
            None => s.serialize_none(),
        }
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Option<f64>, D::Error> {
        d.deserialize_any(super::NumberVisitor)
    }
}

/// One sealed entry of the log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Entry {
    pub seq: AuditSeq,
    /// UTC, RFC 3339 with milliseconds.
    pub time: String,
    /// Who acted: the OS user of the process that wrote the entry.
    pub user: String,
    #[serde(flatten)]
    pub event: Event,
    pub prev: String,
    pub hash: String,
}

/// Why a line is not a well-formed entry.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct ParseError(String);

impl Entry {
    /// The entry as a table row: seq, time, user, kind, what happened.
    pub fn cells(&self) -> Vec<String> {
        vec![
            self.seq.0.to_string(),
            self.time.clone(),
            self.user.clone(),
            self.event.kind().to_string(),
            self.event.summary(),
        ]
    }

    /// Builds the entry and computes its hash.
    pub fn seal(seq: AuditSeq, time: DateTime<Utc>, user: &str, event: Event, prev: &str) -> Entry {
        let mut entry = Entry {
            seq,
            time: time.to_rfc3339_opts(SecondsFormat::Millis, true),
            user: user.to_string(),
            event,
            prev: prev.to_string(),
            hash: String::new(),
        };
        // Hash what a reader will parse back from the line, so writer and
        // verifier see the very same numbers.
        let line = serde_json::to_string(&entry).expect("entry serialises");
        let value: serde_json::Value = serde_json::from_str(&line).expect("own line parses");
        entry.hash = content_hash(&value);
        entry
    }

    /// The entry as one JSON line (no newline).
    pub fn line(&self) -> String {
        serde_json::to_string(self).expect("entry serialises")
    }

    pub fn from_line(line: &[u8]) -> Result<Entry, ParseError> {
        serde_json::from_slice(line).map_err(|e| ParseError(e.to_string()))
    }

    pub fn timestamp(&self) -> Option<DateTime<Utc>> {
        DateTime::parse_from_rfc3339(&self.time)
            .ok()
            .map(|t| t.with_timezone(&Utc))
    }
}

/// blake3 of the canonical JSON of an entry without its `hash` field.
fn content_hash(value: &serde_json::Value) -> String {
    let mut v = value.clone();
    if let Some(obj) = v.as_object_mut() {
        obj.remove("hash");
    }
    // serde_json's Value keeps object keys sorted, so this is canonical.
    let canonical = serde_json::to_vec(&v).expect("value serialises");
    blake3::hash(&canonical).to_hex().to_string()
}

/// The first thing wrong with a chain of lines.
#[derive(Debug, Clone, PartialEq)]
pub struct ChainProblem {
    /// Sequence number where the chain first fails (the position expected there).
    pub seq: u64,
    pub reason: String,
}

impl std::fmt::Display for ChainProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "audit entry #{}: {}", self.seq, self.reason)
    }
}

/// Each batch's row file by the log: the last entry that wrote one (its
/// `batch-accepted`, or a later `rows-written` for a move or a migration),
/// with that entry's sequence number. Batches accepted before row files and
/// not yet moved have none.
pub fn row_files(entries: &[Entry]) -> BTreeMap<BatchId, (AuditSeq, crate::rowfile::FileRef)> {
    let mut out = BTreeMap::new();
    for e in entries {
        if let Event::BatchAccepted {
            batch,
            rows_file: Some(f),
            ..
        }
        | Event::RowsWritten {
            batch,
            rows_file: f,
            ..
        } = &e.event
        {
            out.insert(*batch, (e.seq, f.clone()));
        }
    }
    out
}

/// Checks that `lines` form an intact, contiguous chain from entry 1.
/// Returns the parsed entries, or the first problem.
pub fn verify_chain<'a>(
    lines: impl IntoIterator<Item = &'a [u8]>,
) -> Result<Vec<Entry>, ChainProblem> {
    let mut prev = GENESIS.to_string();
    let mut out = Vec::new();
    for (i, line) in lines.into_iter().enumerate() {
        let expected = i as u64 + 1;
        let fail = |reason: String| ChainProblem {
            seq: expected,
            reason,
        };
        let value: serde_json::Value =
            serde_json::from_slice(line).map_err(|e| fail(format!("not valid JSON: {e}")))?;
        let stated = value
            .get("hash")
            .and_then(|h| h.as_str())
            .ok_or_else(|| fail("has no hash".into()))?
            .to_string();
        let entry = Entry::from_line(line).map_err(|e| fail(format!("not a valid entry: {e}")))?;
        if entry.seq.0 != expected {
            return Err(fail(format!(
                "sequence number is {} where {expected} was expected (an entry was deleted, inserted or moved)",
                entry.seq.0
            )));
        }
        if entry.prev != prev {
            return Err(fail("does not follow the entry before it (prev hash differs): an entry before it was changed, deleted or moved".into()));
        }
        if content_hash(&value) != stated {
            return Err(fail(
                "content does not match its hash: the entry was edited".into(),
            ));
        }
        prev = stated;
        out.push(entry);
    }
    Ok(out)
}

/// Which entries `log` shows.
#[derive(Debug, Clone, Default)]
pub struct Filter {
    pub since: Option<DateTime<Utc>>,
    pub until: Option<DateTime<Utc>>,
    pub kinds: Vec<String>,
    pub batch: Option<BatchId>,
    pub model: Option<ModelId>,
    /// Keep only the newest this many (after the other filters).
    pub limit: Option<usize>,
}

impl Filter {
    pub fn matches(&self, e: &Entry) -> bool {
        let t = e.timestamp();
        if let (Some(s), Some(t)) = (self.since, t)
            && t < s
        {
            return false;
        }
        if let (Some(u), Some(t)) = (self.until, t)
            && t > u
        {
            return false;
        }
        if !self.kinds.is_empty() && !self.kinds.iter().any(|k| k == e.event.kind()) {
            return false;
        }
        if let Some(b) = self.batch
            && e.event.batch() != Some(b)
        {
            return false;
        }
        if let Some(m) = self.model
            && e.event.model() != Some(m)
        {
            return false;
        }
        true
    }

    /// The matching entries, oldest first, limited to the newest `limit`.
    pub fn apply<'a>(&self, entries: &'a [Entry]) -> Vec<&'a Entry> {
        let mut out: Vec<&Entry> = entries.iter().filter(|e| self.matches(e)).collect();
        if let Some(n) = self.limit {
            let skip = out.len().saturating_sub(n);
            out.drain(..skip);
        }
        out
    }
}

/// Parses `--since`/`--until`: RFC 3339, a date (midnight UTC), or a span
/// back from `now` such as `30m`, `12h`, `7d`, `2w`.
pub fn parse_when(s: &str, now: DateTime<Utc>) -> Result<DateTime<Utc>, String> {
    if let Ok(t) = DateTime::parse_from_rfc3339(s) {
        return Ok(t.with_timezone(&Utc));
    }
    if let Ok(d) = chrono::NaiveDate::parse_from_str(s, "%Y-%m-%d") {
        return Ok(d.and_hms_opt(0, 0, 0).expect("midnight").and_utc());
    }
    let unit_at = s.len().saturating_sub(1);
    if let (Ok(n), Some(unit)) = (s[..unit_at].parse::<i64>(), s.get(unit_at..)) {
        let secs = match unit {
            "s" => Some(1),
            "m" => Some(60),
            "h" => Some(3600),
            "d" => Some(86_400),
            "w" => Some(604_800),
            _ => None,
        };
        if let Some(secs) = secs
            && n >= 0
            && let Some(t) = n
                .checked_mul(secs)
                .and_then(|x| now.checked_sub_signed(chrono::TimeDelta::try_seconds(x)?))
        {
            return Ok(t);
        }
    }
    Err(format!(
        "{s:?} is not a time: use RFC 3339 (2026-12-01T08:00:00Z), a date (2026-12-01) or a span back from now (30m, 12h, 7d, 2w)"
    ))
}

/// Failures of the `audit.jsonl` file.
#[derive(Debug, thiserror::Error)]
pub enum MirrorError {
    #[error("{path}:{line}: not an audit entry ({reason}); run `tidegate verify`")]
    BadLine {
        path: PathBuf,
        line: usize,
        reason: String,
    },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

/// The append-only `audit.jsonl` beside the store.
pub struct Mirror {
    path: PathBuf,
}

impl Mirror {
    pub fn new(path: PathBuf) -> Mirror {
        Mirror { path }
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    fn io(&self, source: std::io::Error) -> MirrorError {
        MirrorError::Io {
            path: self.path.clone(),
            source,
        }
    }

    /// The complete lines of the file (a missing file has none). A trailing
    /// piece without a newline, left by a crash mid-append, is not a line.
    pub fn read_lines(&self) -> Result<Vec<Vec<u8>>, MirrorError> {
        let bytes = match fs::read(&self.path) {
            Ok(b) => b,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
            Err(e) => return Err(self.io(e)),
        };
        let complete = bytes.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
        Ok(bytes[..complete]
            .split(|&b| b == b'\n')
            .filter(|l| !l.is_empty())
            .map(<[u8]>::to_vec)
            .collect())
    }

    /// Every entry in the file, parsed (without checking the chain; that is
    /// `verify`'s job). A line that is not an entry is an error naming it.
    pub fn entries(&self) -> Result<Vec<Entry>, MirrorError> {
        self.read_lines()?
            .iter()
            .enumerate()
            .map(|(i, l)| {
                Entry::from_line(l).map_err(|e| MirrorError::BadLine {
                    path: self.path.clone(),
                    line: i + 1,
                    reason: e.to_string(),
                })
            })
            .collect()
    }

    /// Appends lines and fsyncs.
    pub fn append(&self, lines: &[&[u8]]) -> Result<(), MirrorError> {
        if lines.is_empty() {
            return Ok(());
        }
        let mut buf = Vec::new();
        for l in lines {
            buf.extend_from_slice(l);
            buf.push(b'\n');
        }
        let mut f = fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&self.path)
            .map_err(|e| self.io(e))?;
        f.write_all(&buf).map_err(|e| self.io(e))?;
        f.sync_all().map_err(|e| self.io(e))?;
        Ok(())
    }

    /// Brings the file level with the store: drops a torn last line and
    /// appends every stored entry the file lacks, by sequence number.
    /// Returns how many were appended.
    ///
    /// The file normally holds the store's first entries, line for line.
    /// When it does not, and every line past the point where it parts from
    /// the store is one of the store's own entries out of place (an append
    /// that failed while later ones succeeded, or one made twice), the file
    /// is cut back to that point and the store's entries follow in order:
    /// no text is lost that the store does not hold. A line that matches no
    /// stored entry (an edit) is never rewritten; only entries after the
    /// file's last one are appended, and `verify` reports the edit.
    pub fn catch_up(&self, stored: &[(AuditSeq, Vec<u8>)]) -> Result<usize, MirrorError> {
        let bytes = match fs::read(&self.path) {
            Ok(b) => b,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Vec::new(),
            Err(e) => return Err(self.io(e)),
        };
        let complete = bytes.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
        // (start offset, line) of each complete line.
        let mut lines: Vec<(usize, &[u8])> = Vec::new();
        let mut at = 0;
        for piece in bytes[..complete].split(|&b| b == b'\n') {
            if !piece.is_empty() {
                lines.push((at, piece));
            }
            at += piece.len() + 1;
        }
        let stored_line = |seq: AuditSeq| {
            stored
                .binary_search_by_key(&seq, |(s, _)| *s)
                .ok()
                .map(|i| stored[i].1.as_slice())
        };
        let seq_of = |line: &[u8]| Entry::from_line(line).ok().map(|e| e.seq);
        let in_step = lines
            .iter()
            .zip(stored)
            .take_while(|((_, l), (_, s))| l == &s.as_slice())
            .count();
        let misplaced_own = lines[in_step..]
            .iter()
            .all(|(_, l)| seq_of(l).and_then(stored_line) == Some(*l));
        let (keep, from) = if in_step == lines.len() || misplaced_own {
            let keep = lines.get(in_step).map_or(complete, |(start, _)| *start);
            (keep, in_step)
        } else {
            // An edited line: leave the file as it is, add what follows it.
            let last = lines.last().and_then(|(_, l)| seq_of(l));
            let from = match last {
                Some(seq) => stored.partition_point(|(s, _)| *s <= seq),
                None => lines.len(),
            };
            (complete, from)
        };
        if keep < bytes.len() {
            let f = fs::OpenOptions::new()
                .write(true)
                .open(&self.path)
                .map_err(|e| self.io(e))?;
            f.set_len(keep as u64).map_err(|e| self.io(e))?;
            f.sync_all().map_err(|e| self.io(e))?;
        }
        let missing: Vec<&[u8]> = stored
            .iter()
            .skip(from)
            .map(|(_, l)| l.as_slice())
            .collect();
        self.append(&missing)?;
        Ok(missing.len())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn t(s: &str) -> DateTime<Utc> {
        DateTime::parse_from_rfc3339(s).unwrap().with_timezone(&Utc)
    }

    fn chain(n: u64) -> Vec<Entry> {
        let mut prev = GENESIS.to_string();
        (1..=n)
            .map(|i| {
                let e = Entry::seal(
                    AuditSeq(i),
                    t("2026-12-01T00:00:00Z") + chrono::TimeDelta::hours(i as i64),
                    "ana",
                    Event::BatchDuplicate {
                        file: format!("f{i}.csv"),
                        file_hash: "ab".into(),
                        duplicate_of: BatchId(i),
                    },
                    &prev,
                );
                prev = e.hash.clone();
                e
            })
            .collect()
    }

    fn lines(entries: &[Entry]) -> Vec<Vec<u8>> {
        entries.iter().map(|e| e.line().into_bytes()).collect()
    }

    fn check(lines: &[Vec<u8>]) -> Result<Vec<Entry>, ChainProblem> {
        verify_chain(lines.iter().map(Vec::as_slice))
    }

    #[test]
    fn intact_chain_verifies_and_round_trips() {
        let entries = chain(5);
        let parsed = check(&lines(&entries)).unwrap();
        assert_eq!(parsed, entries);
        assert_eq!(entries[0].prev, GENESIS);
        assert_eq!(entries[1].prev, entries[0].hash);
    }

    #[test]
    fn edit_is_found_at_the_edited_entry() {
        let mut l = lines(&chain(5));
        l[2] = String::from_utf8(l[2].clone())
            .unwrap()
            .replace("f3.csv", "g3.csv")
            .into_bytes();
        assert_eq!(check(&l).unwrap_err().seq, 3);
    }

    #[test]
    fn delete_insert_and_reorder_are_found() {
        let base = lines(&chain(5));
        let mut deleted = base.clone();
        deleted.remove(1);
        assert_eq!(check(&deleted).unwrap_err().seq, 2);
        let mut reordered = base.clone();
        reordered.swap(2, 3);
        assert_eq!(check(&reordered).unwrap_err().seq, 3);
        let mut inserted = base.clone();
        inserted.insert(4, base[1].clone());
        assert_eq!(check(&inserted).unwrap_err().seq, 5);
        // Truncating the tail leaves a valid (shorter) chain: the store copy
        // is what catches that, not the chain.
        assert!(check(&base[..3]).is_ok());
    }

    #[test]
    fn rehashed_edit_still_breaks_the_next_link() {
        let mut entries = chain(4);
        entries[1].user = "mallory".into();
        let v = serde_json::to_value(&entries[1]).unwrap();
        entries[1].hash = content_hash(&v);
        assert_eq!(check(&lines(&entries)).unwrap_err().seq, 3);
    }

    #[test]
    fn entries_with_awkward_floats_verify() {
        // Floats whose shortest text form needs 17 digits must survive the
        // round trip through the line exactly, or the chain would break.
        let mut prev = GENESIS.to_string();
        let mut lines = Vec::new();
        for (i, x) in [38.839118296980516_f64, 0.1 + 0.2, 1e-300, 2.0f64.sqrt()]
            .into_iter()
            .enumerate()
        {
            let e = Entry::seal(
                AuditSeq(i as u64 + 1),
                t("2026-12-01T00:00:00Z"),
                "ana",
                Event::CandidateTrained {
                    cycle: 1,
                    model: ModelId(1),
                    run: "cold".into(),
                    parent: None,
                    trained_through: BatchId(1),
                    epochs: 3,
                    seconds: x,
                    stop: "EarlyStop".into(),
                    holdout_rows: 10,
                    holdout_loss: x * 3.0,
                    manifest_hash: "00".into(),
                    widened: BTreeMap::new(),
                    rescaled: Vec::new(),
                },
                &prev,
            );
            prev = e.hash.clone();
            lines.push(e.line().into_bytes());
        }
        assert_eq!(check(&lines).unwrap().len(), 4);
    }

    fn trained(prev: &str, seq: u64, seconds: f64, loss: f64) -> Entry {
        Entry::seal(
            AuditSeq(seq),
            t("2026-12-01T00:00:00Z"),
            "ana",
            Event::CandidateTrained {
                cycle: 1,
                model: ModelId(1),
                run: "warm".into(),
                parent: None,
                trained_through: BatchId(1),
                epochs: 3,
                seconds,
                stop: "Budget".into(),
                holdout_rows: 10,
                holdout_loss: loss,
                manifest_hash: "00".into(),
                widened: BTreeMap::new(),
                rescaled: Vec::new(),
            },
            prev,
        )
    }

    fn same(a: f64, b: f64) -> bool {
        a == b || (a.is_nan() && b.is_nan())
    }

    #[test]
    fn non_finite_numbers_are_written_as_markers_and_read_back() {
        let specials = [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, 1.5];
        let mut prev = GENESIS.to_string();
        let mut lines = Vec::new();
        for (i, &x) in specials.iter().enumerate() {
            let seq = i as u64 * 2 + 1;
            let e = trained(&prev, seq, 2.0, x);
            prev = e.hash.clone();
            lines.push(e.line().into_bytes());
            let hot = Hotspot {
                column: "town".into(),
                value: "Corrin".into(),
                rows: 3,
                mean_loss: x,
                usual_loss: 1.0,
                excess_loss: -x,
            };
            let fresh = Entry::seal(
                AuditSeq(seq + 1),
                t("2026-12-01T00:00:00Z"),
                "ana",
                Event::FreshChecked {
                    check: FreshEvidence {
                        batch: BatchId(2),
                        rows: 3,
                        serving: ModelId(1),
                        verdict: "steady".into(),
                        tested_rows: Some(3),
                        new_conditions: BTreeMap::new(),
                        new_condition_rows: 0,
                        level: Some(x),
                        p_level: None,
                        level_history: 0,
                        shifted_values: vec![],
                        evidence: Some(x),
                        evidence_needed: Some(20.0),
                        monitored_batches: 1,
                        mean_loss_serving: Some(x),
                        mean_loss_reference: None,
                        p_shift: Some(x),
                        previous: None,
                        mean_loss_previous: None,
                        t: Some(-x),
                        p_regression: None,
                        hotspots: vec![hot],
                        reason: "r".into(),
                    },
                },
                &prev,
            );
            prev = fresh.hash.clone();
            lines.push(fresh.line().into_bytes());
        }
        let text: Vec<String> = lines
            .iter()
            .map(|l| String::from_utf8(l.clone()).unwrap())
            .collect();
        assert!(text[0].contains(r#""holdout_loss":"NaN""#), "{}", text[0]);
        assert!(text[2].contains(r#""holdout_loss":"inf""#), "{}", text[2]);
        assert!(text[4].contains(r#""holdout_loss":"-inf""#), "{}", text[4]);
        assert!(text[6].contains(r#""holdout_loss":1.5"#), "{}", text[6]);
        let parsed = check(&lines).unwrap();
        for (i, &x) in specials.iter().enumerate() {
            let Event::CandidateTrained { holdout_loss, .. } = parsed[i * 2].event else {
                panic!("kind")
            };
            assert!(same(holdout_loss, x), "{holdout_loss} read back for {x}");
            let Event::FreshChecked { check } = &parsed[i * 2 + 1].event else {
                panic!("kind")
            };
            assert!(same(check.mean_loss_serving.unwrap(), x));
            assert!(same(check.t.unwrap(), -x));
            assert!(same(check.level.unwrap(), x));
            assert!(same(check.evidence.unwrap(), x));
            assert_eq!(check.p_level, None);
            assert!(same(check.hotspots[0].mean_loss, x));
            assert!(same(check.hotspots[0].excess_loss, -x));
            assert_eq!(check.mean_loss_reference, None);
        }
    }

    #[test]
    fn a_baselines_entry_from_before_the_trees_reads_and_verifies_and_new_ones_round_trip() {
        // A line exactly as builds before the boosted trees wrote it.
        let mut value = serde_json::json!({"kind": "baselines-scored", "cycle": 3,
            "holdout_rows": 120, "trivial_loss": 0.9, "ridge_loss": 0.41, "ridge_lambda": 1.0,
            "serving": 2, "serving_loss": 0.4, "seq": 1, "time": "2026-11-30T05:00:00.000Z",
            "user": "ana", "prev": GENESIS});
        value["hash"] = serde_json::json!(content_hash(&value));
        let line = serde_json::to_vec(&value).unwrap();
        let parsed = check(std::slice::from_ref(&line)).unwrap();
        let Event::BaselinesScored {
            trees_loss,
            trees_rows,
            trees_problem,
            trees_versus,
            ..
        } = &parsed[0].event
        else {
            panic!("{:?}", parsed[0].event)
        };
        assert_eq!(
            (trees_loss, trees_rows, trees_problem),
            (&None, &None, &None)
        );
        assert!(trees_versus.is_empty());
        assert_eq!(
            parsed[0].event.summary(),
            "cycle 3 baselines: ridge 0.4100, trivial 0.9000; serving m000002 0.4000"
        );
        // Written again it has the same fields and values, so its hash
        // still holds: no new key appears in an old entry.
        let rewritten: serde_json::Value = serde_json::from_str(&parsed[0].line()).unwrap();
        assert_eq!(rewritten, value);
        // A new entry with the trees: clearly better than the serving model.
        let event = Event::BaselinesScored {
            cycle: 4,
            holdout_rows: 120,
            trivial_loss: 0.9,
            ridge_loss: Some(0.41),
            ridge_lambda: 1.0,
            ridge_problem: None,
            serving: Some(ModelId(2)),
            serving_loss: Some(0.4),
            trees_loss: Some(0.3),
            trees_rows: Some(20_000),
            trees_problem: None,
            trees_versus: vec![
                TreesVersus {
                    model: ModelId(2),
                    loss: 0.4,
                    p: Some(0.001),
                },
                TreesVersus {
                    model: ModelId(3),
                    loss: 0.42,
                    p: None,
                },
            ],
        };
        let entry = Entry::seal(AuditSeq(2), Utc::now(), "ana", event, &parsed[0].hash);
        let again = check(&[line, entry.line().into_bytes()]).unwrap();
        assert_eq!(again[1], entry);
        assert_eq!(
            entry.event.summary(),
            "cycle 4 baselines: ridge 0.4100, trees 0.3000, trivial 0.9000; serving m000002 0.4000; \
             boosted trees do 25% better than the best network (m000002)"
        );
    }

    #[test]
    fn a_null_number_written_by_an_older_build_reads_as_nan_and_verifies() {
        // What serde_json wrote for a NaN before markers: `null`, hashed as such.
        let mut value = serde_json::to_value(trained(GENESIS, 1, 2.0, 0.5)).unwrap();
        value["holdout_loss"] = serde_json::Value::Null;
        value["hash"] = serde_json::Value::String(content_hash(&value));
        let line = serde_json::to_vec(&value).unwrap();
        let parsed = check(&[line]).unwrap();
        let Event::CandidateTrained { holdout_loss, .. } = parsed[0].event else {
            panic!("kind")
        };
        assert!(holdout_loss.is_nan());
        assert!(Entry::from_line(br#"{"x":1}"#).is_err());
    }

    #[test]
    fn entries_written_with_the_former_names_read_as_the_new_ones_and_verify() {
        // Lines exactly as versions before the renames wrote them: the old
        // kind names and evidence keys, hashed over the line as written.
        let evidence = serde_json::json!({
            "baseline": "serving", "rows": 40, "mean_loss_baseline": 2.5,
            "mean_loss_candidate": 2.4, "relative_improvement": 0.04, "t": 1.1,
            "p": 0.2, "new_rows": 10, "old_rows": 30, "reason": "not significant"
        });
        let old = [
            serde_json::json!({"kind": "batch-rejected", "file": "night-05.csv", "file_hash": "ab",
                "problems": 3, "first_problem": "line 41", "kept_as": "rejected/night-05.csv"}),
            serde_json::json!({"kind": "kept", "cycle": 2, "model": 3,
                "serving": 2, "evidence": evidence, "reason": "keep: not significant"}),
            serde_json::json!({"kind": "promoted", "cycle": 3, "model": 4,
                "previous": 2, "evidence": evidence}),
        ];
        let mut prev = GENESIS.to_string();
        let mut written = Vec::new();
        for (i, fields) in old.into_iter().enumerate() {
            let mut value = fields;
            value["seq"] = serde_json::json!(i + 1);
            value["time"] = serde_json::json!("2026-11-30T05:00:00.000Z");
            value["user"] = serde_json::json!("ana");
            value["prev"] = serde_json::json!(prev);
            let hash = content_hash(&value);
            value["hash"] = serde_json::json!(hash);
            prev = hash;
            written.push(serde_json::to_vec(&value).unwrap());
        }
        let parsed = check(&written).unwrap();
        assert!(
            matches!(&parsed[0].event, Event::BatchRefused { kept_as: Some(k), .. } if k == "rejected/night-05.csv")
        );
        assert_eq!(parsed[0].event.kind(), "batch-refused");
        let Event::Shelved {
            evidence: Some(e), ..
        } = &parsed[1].event
        else {
            panic!("{:?}", parsed[1].event)
        };
        assert_eq!(
            (e.compared_with.as_str(), e.mean_loss_compared_with),
            ("serving", 2.5)
        );
        assert_eq!(
            parsed[1].event.summary(),
            "m000003 shelved (m000002 still serves): not significant"
        );
        let Event::Promoted { evidence, .. } = &parsed[2].event else {
            panic!("{:?}", parsed[2].event)
        };
        assert_eq!(evidence.compared_with, "serving");
        // Written again, an entry uses the new names only.
        let line = Entry::seal(
            AuditSeq(9),
            t("2026-12-01T00:00:00Z"),
            "ana",
            parsed[1].event.clone(),
            GENESIS,
        )
        .line();
        assert!(
            line.contains("\"kind\":\"shelved\"") && line.contains("\"compared_with\":\"serving\""),
            "{line}"
        );
        assert!(
            !line.contains("baseline") && !line.contains("\"kept\""),
            "{line}"
        );
        for (former, now) in Event::FORMER_KINDS {
            assert!(Event::KINDS.contains(now) && !Event::KINDS.contains(former));
        }
    }

    #[test]
    fn filters() {
        let entries = chain(6);
        let f = Filter {
            since: Some(t("2026-12-01T02:00:00Z")),
            until: Some(t("2026-12-01T05:00:00Z")),
            ..Filter::default()
        };
        let seqs: Vec<u64> = f.apply(&entries).iter().map(|e| e.seq.0).collect();
        assert_eq!(seqs, vec![2, 3, 4, 5]);
        let f = Filter {
            limit: Some(2),
            ..Filter::default()
        };
        assert_eq!(
            f.apply(&entries)
                .iter()
                .map(|e| e.seq.0)
                .collect::<Vec<_>>(),
            vec![5, 6]
        );
        let f = Filter {
            kinds: vec!["batch-accepted".into()],
            ..Filter::default()
        };
        assert!(f.apply(&entries).is_empty());
        let f = Filter {
            batch: Some(BatchId(4)),
            ..Filter::default()
        };
        assert_eq!(f.apply(&entries).len(), 1);
    }

    #[test]
    fn when_parsing() {
        let now = t("2026-12-08T12:00:00Z");
        assert_eq!(parse_when("7d", now).unwrap(), t("2026-12-01T12:00:00Z"));
        assert_eq!(parse_when("90m", now).unwrap(), t("2026-12-08T10:30:00Z"));
        assert_eq!(
            parse_when("2026-12-01", now).unwrap(),
            t("2026-12-01T00:00:00Z")
        );
        assert_eq!(
            parse_when("2026-12-01T01:00:00+01:00", now).unwrap(),
            t("2026-12-01T00:00:00Z")
        );
        assert!(parse_when("yesterday", now).is_err());
        assert!(parse_when("-3d", now).is_err());
        assert!(parse_when("d", now).is_err());
    }

    fn stored_of(entries: &[Entry]) -> Vec<(AuditSeq, Vec<u8>)> {
        entries
            .iter()
            .map(|e| (e.seq, e.line().into_bytes()))
            .collect()
    }

    #[test]
    fn mirror_catch_up_fills_a_gap_left_by_a_failed_append() {
        let dir = tempfile::tempdir().unwrap();
        let m = Mirror::new(dir.path().join("audit.jsonl"));
        let stored = stored_of(&chain(5));
        // Entry 4's append failed and the process went on to append entry 5.
        for i in [0, 1, 2, 4] {
            m.append(&[&stored[i].1]).unwrap();
        }
        assert_eq!(m.catch_up(&stored).unwrap(), 2);
        assert_eq!(check(&m.read_lines().unwrap()).unwrap().len(), 5);
        assert_eq!(m.catch_up(&stored).unwrap(), 0);
        // An entry appended twice (a retried append) is dropped again.
        let dir = tempfile::tempdir().unwrap();
        let m = Mirror::new(dir.path().join("audit.jsonl"));
        for i in [0, 1, 1, 2] {
            m.append(&[&stored[i].1]).unwrap();
        }
        m.catch_up(&stored).unwrap();
        assert_eq!(check(&m.read_lines().unwrap()).unwrap().len(), 5);
    }

    #[test]
    fn mirror_catch_up_never_rewrites_an_edited_line() {
        let dir = tempfile::tempdir().unwrap();
        let m = Mirror::new(dir.path().join("audit.jsonl"));
        let stored = stored_of(&chain(5));
        let edited = String::from_utf8(stored[1].1.clone())
            .unwrap()
            .replace("f2.csv", "g2.csv");
        m.append(&[&stored[0].1, edited.as_bytes(), &stored[2].1])
            .unwrap();
        assert_eq!(m.catch_up(&stored).unwrap(), 2);
        let lines = m.read_lines().unwrap();
        assert_eq!(lines.len(), 5);
        assert_eq!(lines[1], edited.as_bytes(), "the evidence stays");
        assert_eq!(check(&lines).unwrap_err().seq, 2);
    }

    #[test]
    fn mirror_catches_up_after_torn_append() {
        let dir = tempfile::tempdir().unwrap();
        let m = Mirror::new(dir.path().join("audit.jsonl"));
        let entries = chain(4);
        let stored: Vec<(AuditSeq, Vec<u8>)> = entries
            .iter()
            .map(|e| (e.seq, e.line().into_bytes()))
            .collect();
        m.append(&[&stored[0].1]).unwrap();
        // A crash in the middle of writing entry 2.
        let mut f = fs::OpenOptions::new().append(true).open(m.path()).unwrap();
        f.write_all(&stored[1].1[..10]).unwrap();
        assert_eq!(m.read_lines().unwrap().len(), 1);
        assert_eq!(m.catch_up(&stored).unwrap(), 3);
        let l = m.read_lines().unwrap();
        assert_eq!(check(&l).unwrap().len(), 4);
        assert_eq!(m.catch_up(&stored).unwrap(), 0);
    }
}
