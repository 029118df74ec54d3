//! What the report shows, read from files only: the audit log, the model
//! manifests, the `serving` pointer and the archived batch files. The store
//! is never opened, so a report can be made while another process owns the
//! state dir. `timeline` is pure and turns log entries into the series the
//! charts draw.

use std::collections::BTreeMap;
use std::path::Path;

use crate::audit::{Entry, Event};
use crate::ids::{BatchId, ModelId};
use crate::ingest::{self, Limits};
use crate::model::checkpoint::{Manifest, read_manifest};
use crate::schema::{RowMatrix, Schema, Vocabularies};
use crate::state::StateDir;

/// What the log says became of a candidate, latest decision wins.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Fate {
    Promoted,
    Shelved,
    RolledBack,
    Approved,
    Declined,
    Awaiting,
    Undecided,
}

impl Fate {
    /// Every fate, in the order the report's legend lists them.
    pub const ALL: [Fate; 7] = [
        Fate::Promoted,
        Fate::Approved,
        Fate::Shelved,
        Fate::Declined,
        Fate::RolledBack,
        Fate::Awaiting,
        Fate::Undecided,
    ];

    pub fn label(self) -> &'static str {
        match self {
            Fate::Promoted => "promoted",
            Fate::Shelved => "shelved",
            Fate::RolledBack => "rolled back",
            Fate::Approved => "approved",
            Fate::Declined => "declined",
            Fate::Awaiting => "awaiting approval",
            Fate::Undecided => "no decision logged",
        }
    }
}

/// One trained candidate and its holdout loss.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    pub cycle: u64,
    pub model: ModelId,
    pub run: String,
    pub holdout_loss: f64,
    pub time: String,
    pub fate: Fate,
}

/// The reference models of one cycle.
#[derive(Debug, Clone, PartialEq)]
pub struct Baselines {
    pub cycle: u64,
    pub trivial_loss: f64,
    pub ridge_loss: Option<f64>,
    /// The boosted trees (absent in cycles logged before they existed).
    pub trees_loss: Option<f64>,
    /// Every network scored in the cycle: its mean loss and the one-sided
    /// p that the trees do better.
    pub networks: Vec<crate::audit::TreesVersus>,
}

/// The boosted trees beside the best network of one cycle.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VersusTrees {
    pub cycle: u64,
    pub network: ModelId,
    pub network_loss: f64,
    pub trees_loss: f64,
    /// How much better the trees do, when that is worth telling
    /// (`audit::TreesVersus::advice`).
    pub trees_better_by: Option<f64>,
}

/// What happened to one arriving file.
#[derive(Debug, Clone, PartialEq)]
pub enum Arrival {
    Accepted {
        batch: BatchId,
        rows: u64,
        /// Drift-flagged columns of the batch.
        drifted: Vec<String>,
        /// Category values never seen before, one "column: values (share)"
        /// per column.
        new_values: Vec<String>,
    },
    Refused {
        problems: u64,
        first_problem: String,
    },
    Duplicate {
        of: BatchId,
    },
}

/// One file in order of arrival, with the rows stored after it.
#[derive(Debug, Clone, PartialEq)]
pub struct FileEvent {
    pub time: String,
    pub file: String,
    pub what: Arrival,
    pub rows_stored: u64,
}

/// One fresh-data check of an accepted batch.
#[derive(Debug, Clone, PartialEq)]
pub struct FreshRow {
    pub batch: BatchId,
    pub serving: ModelId,
    pub verdict: String,
    pub p_shift: Option<f64>,
    pub p_regression: Option<f64>,
}

/// The series drawn from the audit log.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Timeline {
    pub candidates: Vec<Candidate>,
    pub baselines: Vec<Baselines>,
    pub files: Vec<FileEvent>,
    pub fresh: Vec<FreshRow>,
}

impl Timeline {
    /// Accepted batches in order.
    pub fn batches(&self) -> Vec<BatchId> {
        self.files
            .iter()
            .filter_map(|f| match f.what {
                Arrival::Accepted { batch, .. } => Some(batch),
                _ => None,
            })
            .collect()
    }
}

impl Timeline {
    /// The last cycle's boosted trees beside its best network (the
    /// candidates trained on its rows and the model serving then).
    pub fn versus_trees(&self) -> Option<VersusTrees> {
        let b = self
            .baselines
            .iter()
            .rev()
            .find(|b| b.trees_loss.is_some())?;
        let trees_loss = b.trees_loss?;
        let best = crate::audit::TreesVersus::best(&b.networks)?;
        Some(VersusTrees {
            cycle: b.cycle,
            network: best.model,
            network_loss: best.loss,
            trees_loss,
            trees_better_by: crate::audit::TreesVersus::advice(trees_loss, &b.networks)
                .map(|(_, share)| share),
        })
    }
}

/// Builds the report's series from log entries (oldest first).
pub fn timeline(entries: &[Entry]) -> Timeline {
    let mut t = Timeline::default();
    let mut fates: BTreeMap<ModelId, Fate> = BTreeMap::new();
    let mut stored = 0u64;
    for e in entries {
        match &e.event {
            Event::CandidateTrained {
                cycle,
                model,
                run,
                holdout_loss,
                ..
            } => t.candidates.push(Candidate {
                cycle: *cycle,
                model: *model,
                run: run.clone(),
                holdout_loss: *holdout_loss,
                time: e.time.clone(),
                fate: Fate::Undecided,
            }),
            Event::BaselinesScored {
                cycle,
                trivial_loss,
                ridge_loss,
                trees_loss,
                trees_versus,
                ..
            } => t.baselines.push(Baselines {
                cycle: *cycle,
                trivial_loss: *trivial_loss,
                ridge_loss: *ridge_loss,
                trees_loss: *trees_loss,
                networks: trees_versus.clone(),
            }),
            Event::Promoted { model, .. } => {
                fates.insert(*model, Fate::Promoted);
            }
            Event::Shelved { model, .. } => {
                fates.insert(*model, Fate::Shelved);
            }
            Event::AwaitingApproval { model, .. } => {
                fates.insert(*model, Fate::Awaiting);
            }
            Event::Approved { model, .. } => {
                fates.insert(*model, Fate::Approved);
            }
            Event::Declined { model, .. } => {
                fates.insert(*model, Fate::Declined);
            }
            // The model that stopped serving is the one rolled back.
            Event::RolledBack { from, .. } => {
                fates.insert(*from, Fate::RolledBack);
            }
            Event::BatchAccepted {
                batch,
                file,
                rows,
                drift,
                ..
            } => {
                stored += rows;
                t.files.push(FileEvent {
                    time: e.time.clone(),
                    file: file.clone(),
                    what: Arrival::Accepted {
                        batch: *batch,
                        rows: *rows,
                        drifted: drift.as_ref().map_or_else(Vec::new, |d| {
                            d.flagged().into_iter().map(str::to_string).collect()
                        }),
                        new_values: drift
                            .as_ref()
                            .map_or_else(Vec::new, |d| d.new_values_text()),
                    },
                    rows_stored: stored,
                });
            }
            Event::BatchRefused {
                file,
                problems,
                first_problem,
                ..
            } => t.files.push(FileEvent {
                time: e.time.clone(),
                file: file.clone(),
                what: Arrival::Refused {
                    problems: *problems,
                    first_problem: first_problem.clone(),
                },
                rows_stored: stored,
            }),
            Event::BatchDuplicate {
                file, duplicate_of, ..
            } => t.files.push(FileEvent {
                time: e.time.clone(),
                file: file.clone(),
                what: Arrival::Duplicate { of: *duplicate_of },
                rows_stored: stored,
            }),
            Event::FreshChecked { check } => t.fresh.push(FreshRow {
                batch: check.batch,
                serving: check.serving,
                verdict: check.verdict.clone(),
                p_shift: check.p_shift,
                p_regression: check.p_regression,
            }),
            _ => {}
        }
    }
    for c in &mut t.candidates {
        if let Some(f) = fates.get(&c.model) {
            c.fate = *f;
        }
    }
    t
}

/// The serving model named by `state/serving`, if any.
pub fn serving(state: &StateDir) -> anyhow::Result<Option<ModelId>> {
    let path = state.serving();
    match std::fs::read_to_string(&path) {
        Ok(text) => text.trim().parse::<ModelId>().map(Some).map_err(|e| {
            anyhow::anyhow!(
                "{}: {e}; run `tidegate status` (as owner) to rewrite it",
                path.display()
            )
        }),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
        Err(e) => Err(anyhow::anyhow!("cannot read {}: {e}", path.display())),
    }
}

/// Every readable manifest under `models/`, by id, and a note for each
/// folder whose manifest could not be read.
pub fn manifests(models: &Path) -> (BTreeMap<ModelId, Manifest>, Vec<String>) {
    let mut out = BTreeMap::new();
    let mut notes = Vec::new();
    let Ok(dir) = std::fs::read_dir(models) else {
        return (out, notes);
    };
    for entry in dir.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        // Temp folders of a checkpoint being written are not versions.
        let Ok(id) = name.parse::<ModelId>() else {
            continue;
        };
        match read_manifest(&entry.path()) {
            Ok(m) => {
                out.insert(id, m);
            }
            Err(e) => notes.push(e.to_string()),
        }
    }
    (out, notes)
}

/// Stored rows read back from the archive, and the holdout rows among
/// them with the batch each came from.
#[derive(Debug, Clone)]
pub struct StoredRows {
    /// Every stored row (training and holdout).
    pub rows: RowMatrix,
    pub holdout: RowMatrix,
    /// Batch of each holdout row.
    pub holdout_batches: Vec<u64>,
}

/// The stored rows, read back from `archive/<batch>.csv` (the exact bytes
/// that were accepted, so the holdout split is the store's: it is a
/// function of each row's content) and encoded with `vocabs`, which grows
/// by the values each file brings in the order the store gave them codes
/// (so codes match the store's when `vocabs` starts as a model's
/// vocabularies). The rows of batches in `aside` are parsed for their
/// values but not kept. Batches whose file is missing or unreadable are
/// named in the notes and left out.
pub fn stored_rows(
    state: &StateDir,
    batches: &[BatchId],
    aside: &std::collections::BTreeSet<BatchId>,
    schema: &Schema,
    vocabs: &mut Vocabularies,
    limits: &Limits,
) -> (StoredRows, Vec<String>) {
    let mut out = StoredRows {
        rows: RowMatrix::new(schema.width()),
        holdout: RowMatrix::new(schema.width()),
        holdout_batches: Vec::new(),
    };
    let mut notes = Vec::new();
    for &b in batches {
        let path = crate::intake::archive_path(state, b);
        let raw = match ingest::read_file(&path, limits.max_file_bytes) {
            Ok(r) => r,
            Err(e) => {
                notes.push(format!(
                    "{}: {e}; its rows are not drawn (run `tidegate verify`)",
                    path.display()
                ));
                continue;
            }
        };
        match ingest::parse(&raw.bytes, schema, vocabs, limits) {
            Ok(batch) => {
                if !aside.contains(&b) {
                    out.rows.extend(&batch.train);
                    out.rows.extend(&batch.holdout);
                    out.holdout.extend(&batch.holdout);
                    out.holdout_batches
                        .extend(std::iter::repeat_n(b.0, batch.holdout.n_rows()));
                }
                for (col, values) in batch.new_categories {
                    let vocab = vocabs.entry(col).or_default();
                    for v in values {
                        vocab.code_or_insert(&v);
                    }
                }
            }
            Err(r) => notes.push(format!(
                "{}: cannot be read back ({}); its rows are not drawn (run `tidegate verify`)",
                path.display(),
                r.first()
            )),
        }
    }
    (out, notes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::audit::Entry;
    use crate::provenance::fixtures::{chained, gate_evidence};

    fn entries(events: Vec<Event>) -> Vec<Entry> {
        chained(events.into_iter().map(|e| ("ana", e)).collect())
    }

    fn trained(cycle: u64, model: u64, loss: f64) -> Event {
        Event::CandidateTrained {
            cycle,
            model: ModelId(model),
            run: "warm".into(),
            parent: None,
            trained_through: BatchId(1),
            epochs: 3,
            seconds: 0.5,
            stop: "early-stop".into(),
            holdout_rows: 100,
            holdout_loss: loss,
            manifest_hash: "00".into(),
            widened: BTreeMap::new(),
            rescaled: Vec::new(),
        }
    }

    fn accepted(batch: u64, rows: u64) -> Event {
        Event::BatchAccepted {
            batch: BatchId(batch),
            file: format!("night-{batch}.csv"),
            file_hash: "ab".into(),
            rows,
            train_rows: rows - 1,
            holdout_rows: 1,
            new_categories: BTreeMap::new(),
            new_category_counts: Default::default(),
            drift: None,
            suspect: None,
            rows_file: None,
        }
    }

    fn evidence() -> crate::audit::GateEvidence {
        gate_evidence(100)
    }

    #[test]
    fn fates_follow_the_latest_decision_and_rows_accumulate() {
        let log = entries(vec![
            accepted(1, 10),
            Event::BatchRefused {
                file: "bad.csv".into(),
                file_hash: "cd".into(),
                problems: 2,
                first_problem: "line 3: not a number".into(),
                kept_as: None,
            },
            accepted(2, 5),
            Event::BatchDuplicate {
                file: "again.csv".into(),
                file_hash: "ab".into(),
                duplicate_of: BatchId(1),
            },
            trained(1, 1, 4.0),
            Event::BaselinesScored {
                cycle: 1,
                holdout_rows: 100,
                trivial_loss: 9.0,
                ridge_loss: Some(5.0),
                ridge_lambda: 1.0,
                ridge_problem: None,
                serving: None,
                serving_loss: None,
                trees_loss: Some(3.0),
                trees_rows: Some(300),
                trees_problem: None,
                trees_versus: vec![crate::audit::TreesVersus {
                    model: ModelId(1),
                    loss: 4.0,
                    p: Some(0.01),
                }],
            },
            Event::Promoted {
                cycle: 1,
                model: ModelId(1),
                previous: None,
                evidence: evidence(),
            },
            trained(2, 2, 3.0),
            trained(2, 3, 3.5),
            Event::Promoted {
                cycle: 2,
                model: ModelId(2),
                previous: Some(ModelId(1)),
                evidence: evidence(),
            },
            Event::Shelved {
                cycle: 2,
                model: ModelId(3),
                serving: Some(ModelId(2)),
                evidence: None,
                reason: "not better".into(),
            },
            Event::RolledBack {
                from: ModelId(2),
                to: ModelId(1),
                how: "manual".into(),
                reason: "complaints".into(),
                evidence: None,
            },
        ]);
        let t = timeline(&log);
        let fates: Vec<(u64, Fate)> = t.candidates.iter().map(|c| (c.model.0, c.fate)).collect();
        assert_eq!(
            fates,
            vec![
                (1, Fate::Promoted),
                (2, Fate::RolledBack),
                (3, Fate::Shelved)
            ]
        );
        assert_eq!(t.candidates[1].holdout_loss, 3.0);
        assert_eq!(t.baselines.len(), 1);
        assert_eq!(t.baselines[0].ridge_loss, Some(5.0));
        // Model 1 (loss 4.0), the only network of cycle 1, against trees at
        // 3.0 with p = 0.01: 25% better, worth telling. Cycle 2 logged no
        // baselines.
        let v = t.versus_trees().unwrap();
        assert_eq!(
            (v.cycle, v.network, v.network_loss, v.trees_loss),
            (1, ModelId(1), 4.0, 3.0)
        );
        assert!((v.trees_better_by.unwrap() - 0.25).abs() < 1e-12);
        let stored: Vec<u64> = t.files.iter().map(|f| f.rows_stored).collect();
        assert_eq!(stored, vec![10, 10, 15, 15]);
        assert!(matches!(
            t.files[1].what,
            Arrival::Refused { problems: 2, .. }
        ));
        assert_eq!(t.batches(), vec![BatchId(1), BatchId(2)]);
    }

    #[test]
    fn an_empty_log_gives_empty_series() {
        assert_eq!(timeline(&[]), Timeline::default());
    }

    #[test]
    fn unreadable_manifests_are_named_not_fatal() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir(dir.path().join("m000001")).unwrap();
        std::fs::write(dir.path().join("m000001/manifest.json"), "{not json").unwrap();
        std::fs::create_dir(dir.path().join(".tmp-123-m000002")).unwrap();
        let (found, notes) = manifests(dir.path());
        assert!(found.is_empty());
        assert_eq!(notes.len(), 1);
        assert!(notes[0].contains("m000001"), "{}", notes[0]);
        let (found, notes) = manifests(&dir.path().join("absent"));
        assert!(found.is_empty() && notes.is_empty());
    }
}
