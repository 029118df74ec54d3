//! One retrain cycle: train candidates (warm from the serving model, cold
//! on schedule or on request; when the serving model saw rows since set
//! aside, cold and warm from the newest model that passed the gate and
//! never saw them), score them and the serving model on the same
//! holdout rows, let the gate decide, then promote or keep. Every step is an
//! audit entry; promotion moves the store's serving pointer in the same
//! transaction as its entry. The cycle is a sequence of stages, each a
//! function that takes the values the one before produced: [`plan`],
//! [`read`], [`train`], [`score`], [`judge`] (pure) and [`record`].
//!
//! What a cycle trains on: the serving model remembers the last batch it
//! was trained through (`model/<id>` in the store's meta tree). Rows of
//! later batches are "new": a warm candidate trains on them plus a replay
//! sample of the older rows; the gate's guards look at new and older
//! holdout rows separately.

use std::collections::BTreeMap;
use std::sync::atomic::AtomicBool;

use chrono::Utc;
use serde::{Deserialize, Serialize};

use crate::audit::{Event, GateEvidence};
use crate::baseline::{self, Ridge};
use crate::gate::{self, Decision, Scores};
use crate::ids::{BatchId, ModelId};
use crate::model::checkpoint::{self, Checkpoint, CheckpointMeta, RunKind};
use crate::model::{Model, ModelError, TrainingSummary};
use crate::rng::Rng;
use crate::sample;
use crate::schema::{FeatureSpec, RowMatrix};
use crate::state::{Owner, StateError};
use crate::store::{
    META_CYCLES, META_NEXT_MODEL, META_OPEN_CYCLE, META_SERVING, MetaChange, Split, StoreError,
};
use crate::train::stream::{self as streaming, ColdRows};
use crate::train::{self, Control, Progress, TrainError};

mod holdout;

/// What the store remembers about each trained model version.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelRecord {
    pub id: ModelId,
    pub parent: Option<ModelId>,
    pub run: RunKind,
    /// Last batch whose training rows this model has seen.
    pub trained_through: BatchId,
    pub cycle: u64,
    pub holdout_loss: f64,
}

/// Key of a model's record in the meta tree.
pub fn model_key(id: ModelId) -> Vec<u8> {
    let mut k = b"model/".to_vec();
    k.extend_from_slice(&id.key());
    k
}

/// How to run a cycle.
#[derive(Debug, Clone, Copy, Default)]
pub struct Options {
    /// Train a cold candidate too, whatever the schedule says.
    pub force_cold: bool,
    /// Train and judge, but change nothing and record nothing.
    pub dry_run: bool,
    /// A winning candidate waits for approval even outside approval mode
    /// (`[daemon] on_drift = "hold"`).
    pub hold: bool,
}

/// One trained candidate and its score.
#[derive(Debug, Clone)]
pub struct Candidate {
    /// `None` in a dry run (nothing is saved).
    pub id: Option<ModelId>,
    pub run: RunKind,
    pub summary: TrainingSummary,
    pub holdout_loss: f64,
}

/// How a cycle ended.
#[derive(Debug, Clone)]
pub enum Outcome {
    /// The serving model has seen every batch; nothing to do.
    NothingNew {
        serving: ModelId,
    },
    Decided(Box<Report>),
}

/// Everything a cycle found and did.
#[derive(Debug, Clone)]
pub struct Report {
    pub cycle: u64,
    pub serving_before: Option<ModelId>,
    /// Mean holdout loss of the serving model (or of the trivial predictor
    /// when nothing serves yet).
    pub baseline_loss: f64,
    /// Mean holdout loss of the training mean / class frequencies.
    pub trivial_loss: f64,
    /// Mean holdout loss of the ridge baseline (`None` if it could not be fitted).
    pub ridge_loss: Option<f64>,
    /// Mean holdout loss of the boosted trees (`None` if they could not be
    /// fitted).
    pub trees_loss: Option<f64>,
    /// How much lower the trees' holdout loss is than the best network
    /// scored in the cycle (candidates and the serving model), when that is
    /// worth telling (`trees::best_network_advice`).
    pub trees_better_by: Option<f64>,
    pub holdout_rows: usize,
    /// Batches the holdout rows came from, and the batches a decision needs.
    pub holdout_batches: usize,
    pub batches_needed: usize,
    pub new_batches: Vec<BatchId>,
    pub candidates: Vec<Candidate>,
    /// Index into `candidates` of the one the cycle acts on.
    pub judged: usize,
    /// The gate's decision on each candidate, in `candidates` order.
    pub decisions: Vec<Decision>,
    /// The decision on the candidate the cycle acts on.
    pub decision: Decision,
    /// The model serving after the cycle.
    pub serving_after: Option<ModelId>,
    pub dry_run: bool,
}

/// Failures that stop a cycle (the serving model is untouched by all of them).
#[derive(Debug, thiserror::Error)]
pub enum CycleError {
    #[error("the store holds no batches yet; ingest data first")]
    NoData,
    #[error("a candidate is already waiting for approval ({0}); approve or decline it first")]
    Pending(ModelId),
    #[error(transparent)]
    State(#[from] StateError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Audit(#[from] crate::audit::MirrorError),
    #[error(transparent)]
    Model(#[from] ModelError),
    #[error("training failed: {0}")]
    Train(#[from] TrainError),
    #[error("the gate could not score the models: {0}")]
    Scoring(String),
}

/// Runs one cycle as a sequence of stages that hand values to each other:
/// [`plan`] → (log the start) → [`read`] → [`train`] → [`score`] →
/// [`judge`] (choose and decide, pure) → [`record`]. `progress` (if any)
/// hears from every candidate; `cancel` stops training between
/// mini-batches (the cycle then fails, recorded as abandoned at the next
/// start).
pub fn run(
    owner: &mut Owner,
    options: Options,
    user: &str,
    progress: Option<&(dyn Fn(Progress) + Sync)>,
    cancel: Option<&AtomicBool>,
) -> Result<Outcome, CycleError> {
    let plan = match plan(owner, options)? {
        Planned::NothingNew(serving) => return Ok(Outcome::NothingNew { serving }),
        Planned::Run(plan) => plan,
    };
    if !options.dry_run {
        record_start(owner, &plan, user)?;
    }
    let data = read(owner, &plan)?;
    let trained = train(owner, &plan, &data, progress, cancel)?;
    let scored = score(owner, &plan, &data, trained)?;
    let mut policy = gate::Policy::from(&owner.config.gate);
    policy.require_approval |= options.hold;
    let judgement = judge(&scored, &data, &policy);
    let report = record(owner, &plan, &data, scored, judgement, options, user)?;
    Ok(Outcome::Decided(Box::new(report)))
}

/// What a cycle will do, decided before any row is read.
pub struct Plan {
    pub cycle: u64,
    /// The newest stored batch.
    pub last: BatchId,
    /// The last batch the serving model was trained on (0 with none).
    pub through: BatchId,
    pub serving: Option<(ModelId, ModelRecord, Checkpoint)>,
    /// When the serving model saw batches since set aside: the newest model
    /// that passed the gate and never saw them, which the warm candidate
    /// starts from instead (`provenance::newest_clean`).
    pub clean_parent: Option<(ModelId, ModelRecord, Checkpoint)>,
    pub want_warm: bool,
    pub want_cold: bool,
    pub new_batches: Vec<BatchId>,
    pub fingerprint: String,
}

impl Plan {
    pub fn serving_id(&self) -> Option<ModelId> {
        self.serving.as_ref().map(|(id, _, _)| *id)
    }

    /// The model the warm candidate starts from: the serving model, or the
    /// clean parent when there is one.
    pub fn warm_parent(&self) -> Option<(ModelId, &ModelRecord, &Checkpoint)> {
        if !self.want_warm {
            return None;
        }
        self.clean_parent
            .as_ref()
            .or(self.serving.as_ref())
            .map(|(id, r, ck)| (*id, r, ck))
    }

    /// The last batch the warm parent was trained through: the training
    /// rows after it are the warm candidate's new rows (the serving model's
    /// own `through` when nothing warms).
    pub fn warm_through(&self) -> BatchId {
        self.warm_parent()
            .map_or(self.through, |(_, r, _)| r.trained_through)
    }
}

/// Whether a cycle has anything to do.
pub enum Planned {
    NothingNew(ModelId),
    Run(Box<Plan>),
}

/// Stage 1: which candidates to train, from the store's state.
pub fn plan(owner: &Owner, options: Options) -> Result<Planned, CycleError> {
    let store = &owner.store;
    // Batches set aside are not data for a cycle: neither the last batch
    // nor a new one.
    let in_use: Vec<BatchId> = store
        .split_counts(Split::Train, None, None)?
        .iter()
        .map(|(b, _)| *b)
        .collect();
    let last = in_use.last().copied().unwrap_or(BatchId(0));
    if last.0 == 0 {
        return Err(CycleError::NoData);
    }
    if let Some(pending) = store
        .meta_value(META_PENDING)?
        .and_then(|v| ModelId::from_key(&v))
    {
        return Err(CycleError::Pending(pending));
    }
    let fingerprint = owner.config.schema_fingerprint();
    let serving = match store.serving()? {
        Some(id) => {
            let record = model_record(owner, id)?;
            let ck = owner.checkpoint(id)?;
            Some((id, record, ck))
        }
        None => None,
    };
    let through = serving
        .as_ref()
        .map_or(BatchId(0), |(_, r, _)| r.trained_through);
    // Rows set aside since the serving model learnt from them live on in
    // its weights: no warm start from it, and a cold candidate even when
    // nothing new arrived. A warm one starts from the newest model that
    // passed the gate and never saw them, if there is one.
    let taint = match &serving {
        Some((id, _, _)) => taint(store, *id)?,
        None => Taint::default(),
    };
    let tainted = taint.batches;
    let clean_parent = match taint.clean {
        Some(id) => {
            let loaded = model_record(owner, id)
                .map_err(|e| e.to_string())
                .and_then(|record| {
                    let ck = owner.checkpoint(id).map_err(|e| e.to_string())?;
                    Ok((id, record, ck))
                });
            loaded
                .inspect_err(|e| tracing::warn!("{id} cannot be a warm start: {e}"))
                .ok()
        }
        None => None,
    };
    if !tainted.is_empty() {
        tracing::info!(
            "the serving model saw {} (since set aside): this cycle trains {}",
            crate::provenance::ranges_text(&tainted.iter().copied().collect()),
            match &clean_parent {
                Some((id, _, _)) => format!("cold and warm from {id}, which never saw them"),
                None => "cold only (no model that passed the gate never saw them)".into(),
            }
        );
    }
    if let Some((id, _, _)) = &serving
        && through >= last
        && !options.force_cold
        && tainted.is_empty()
    {
        return Ok(Planned::NothingNew(*id));
    }
    let cycle = store.cycles()? + 1;
    let cold_due =
        owner.config.gate.cold_every > 0 && cycle % owner.config.gate.cold_every as u64 == 0;
    let want_warm = serving.is_some() && (tainted.is_empty() || clean_parent.is_some());
    let want_cold = serving.is_none() || options.force_cold || cold_due || !tainted.is_empty();
    Ok(Planned::Run(Box::new(Plan {
        cycle,
        last,
        through,
        want_warm,
        want_cold,
        new_batches: in_use.iter().filter(|b| **b > through).copied().collect(),
        serving,
        clean_parent,
        fingerprint,
    })))
}

/// What batches now set aside mean for a cycle.
#[derive(Debug, Default)]
pub struct Taint {
    /// Batches now set aside that the serving model saw.
    pub batches: Vec<BatchId>,
    /// When there are such batches: the newest model that passed the gate
    /// and never saw any batch set aside.
    pub clean: Option<ModelId>,
}

/// Batches now set aside that `model` saw, directly or through the models
/// it was warm-started from, and the model a warm start may begin from
/// instead (both read from the log; the set aside batches from the store).
pub fn taint(store: &crate::store::Store, model: ModelId) -> Result<Taint, StoreError> {
    let aside = store.set_aside_batches();
    if aside.is_empty() {
        return Ok(Taint::default());
    }
    let entries: Vec<crate::audit::Entry> = store
        .audit_entries()?
        .iter()
        .filter_map(|(_, line)| crate::audit::Entry::from_line(line).ok())
        .collect();
    let replay = crate::provenance::replay(&entries);
    let batches: Vec<BatchId> = replay
        .lineages
        .get(&model)
        .map(|l| l.saw.intersection(aside).copied().collect())
        .unwrap_or_default();
    let clean = if batches.is_empty() {
        None
    } else {
        crate::provenance::newest_clean(&replay, aside)
    };
    Ok(Taint { batches, clean })
}

fn record_start(owner: &mut Owner, plan: &Plan, user: &str) -> Result<(), CycleError> {
    let mut kinds = Vec::new();
    if plan.want_warm {
        kinds.push("warm".to_string());
    }
    if plan.want_cold {
        kinds.push("cold".to_string());
    }
    let event = Event::CycleStarted {
        cycle: plan.cycle,
        serving: plan.serving_id(),
        new_batches: plan.new_batches.clone(),
        candidates: kinds,
    };
    let entry = owner.store.record_with_meta(
        event,
        user,
        Utc::now(),
        &[
            (META_CYCLES, Some(plan.cycle.to_be_bytes().to_vec())),
            (META_OPEN_CYCLE, Some(plan.cycle.to_be_bytes().to_vec())),
        ],
    )?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    Ok(())
}

/// The rows a cycle works on.
pub struct Data {
    /// Training rows of the batches the warm parent has not seen.
    pub new_train: RowMatrix,
    /// A uniform sample of older training rows (see `older_sample_size`).
    pub older_train: RowMatrix,
    pub older_n: usize,
    /// Every training row, when a cold candidate trains and they fit in
    /// the cycle's memory budget (`[memory] cycle_mb`).
    pub all_train: Option<RowMatrix>,
    /// When a cold candidate trains and its rows do not fit: how it
    /// streams them, and the training rows per batch it streams.
    pub cold_stream: Option<(streaming::Sizes, Vec<(BatchId, usize)>)>,
    /// Holdout rows (not read here: scoring streams them from the store,
    /// older batches first).
    pub holdout_rows: usize,
    /// Per holdout row: it arrived after the serving model was trained.
    pub new_flags: Vec<bool>,
    /// Per holdout row: the batch it came from (the gate's clusters).
    pub holdout_batches: Vec<u64>,
}

/// Stage 2: the data, read once. Training rows split at the warm parent's
/// last batch (the serving model's, unless it saw rows since set aside): the new ones all, the older ones as a uniform sample read
/// chunk by chunk, unless a cold candidate needs them all anyway. Holdout
/// rows all, in store order, with a new/older flag and a batch each.
pub fn read(owner: &Owner, plan: &Plan) -> Result<Data, CycleError> {
    let step = std::time::Instant::now();
    let store = &owner.store;
    // Training rows split where the warm parent stopped; holdout rows are
    // new or older relative to the serving model, which the gate compares
    // with.
    let through = plan.warm_through();
    let new_n = store.row_count(Split::Train, Some(through.next()), None)?;
    let older_n = store.row_count(Split::Train, None, Some(through))?;
    let holdout_counts = store.split_counts(Split::Holdout, None, None)?;
    let holdout_rows: usize = holdout_counts.iter().map(|(_, n)| n).sum();
    let cold = if plan.want_cold {
        let columns = store.schema().width();
        let width = cold_spec(owner)?.width();
        // What the cycle holds besides a cold candidate's rows: the warm
        // candidate's (read and encoded), or with none the baselines'
        // samples; and one holdout slice being scored.
        let beside = if plan.want_warm {
            new_n + older_sample_size(new_n, older_n, &owner.config.training)
        } else {
            new_n.min(OLDER_SAMPLE_MIN) + older_n.min(OLDER_SAMPLE_MIN)
        };
        let others = streaming::held_bytes(beside, columns, width)
            + streaming::held_bytes(SCORE_ROWS.min(holdout_rows), columns, width);
        // The cold candidate gets what the rest leaves, but never less than
        // half the budget: a budget the rest nearly fills is exceeded
        // rather than streamed through a window of a few rows.
        let budget = owner.config.memory.cycle_bytes();
        let left = budget.saturating_sub(others).max(budget / 2);
        Some(streaming::cold_rows(
            left,
            older_n + new_n,
            columns,
            width,
            owner.config.training.batch_size.max(1),
        ))
    } else {
        None
    };
    // A streamed cold candidate alone: the new rows serve only the
    // baselines, which a uniform sample of them serves as well.
    let sampled = !plan.want_warm && matches!(cold, Some(ColdRows::Streamed(_)));
    let new_train = if sampled {
        let picks = sample::choose(
            new_n,
            OLDER_SAMPLE_MIN,
            &mut Rng::new(sample::seed_for(
                owner.config.training.seed,
                &[&b"new-train/"[..], &through.key()].concat(),
            )),
        );
        store.rows_at(Split::Train, Some(through.next()), None, &picks)?
    } else {
        store.rows(Split::Train, Some(through.next()), None)?
    };
    let want_older = if sampled {
        OLDER_SAMPLE_MIN.min(older_n)
    } else {
        older_sample_size(new_train.n_rows(), older_n, &owner.config.training)
    };
    let picks = sample::choose(
        older_n,
        want_older,
        &mut Rng::new(sample::seed_for(
            owner.config.training.seed,
            &[&b"older-train/"[..], &through.key()].concat(),
        )),
    );
    let (older_train, all_train, cold_stream) = match cold {
        Some(ColdRows::Held) => {
            let mut all = store.rows(Split::Train, None, Some(through))?;
            let older = if picks.len() == older_n {
                all.clone()
            } else {
                all.select(&picks)
            };
            all.extend(&new_train);
            (older, Some(all), None)
        }
        Some(ColdRows::Streamed(sizes)) => (
            store.rows_at(Split::Train, None, Some(through), &picks)?,
            None,
            Some((sizes, store.split_counts(Split::Train, None, None)?)),
        ),
        None => (
            store.rows_at(Split::Train, None, Some(through), &picks)?,
            None,
            None,
        ),
    };
    let older_holdout: usize = holdout_counts
        .iter()
        .filter(|(b, _)| *b <= plan.through)
        .map(|(_, n)| n)
        .sum();
    let new_flags: Vec<bool> = (0..holdout_rows).map(|i| i >= older_holdout).collect();
    let holdout_batches: Vec<u64> = holdout_counts
        .iter()
        .flat_map(|(b, n)| std::iter::repeat_n(b.0, *n))
        .collect();
    tracing::debug!(
        "cycle {}: read {} new and {} of {older_n} older training rows{}, {} holdout rows in {:.3} s (peak RSS {} MB)",
        plan.cycle,
        new_train.n_rows(),
        older_train.n_rows(),
        if all_train.is_some() {
            " (all older rows for the cold candidate)"
        } else if sampled {
            " (samples for the baselines; the cold candidate streams every training row)"
        } else if cold_stream.is_some() {
            " (the cold candidate streams every training row)"
        } else {
            ""
        },
        holdout_rows,
        step.elapsed().as_secs_f64(),
        peak_rss_mb()
    );
    Ok(Data {
        new_train,
        older_train,
        older_n,
        all_train,
        cold_stream,
        holdout_rows,
        new_flags,
        holdout_batches,
    })
}

/// The trained candidates and what the warm parent's encoding gained.
pub struct Trained {
    pub models: Vec<(RunKind, Model, TrainingSummary)>,
    pub widened_columns: BTreeMap<String, usize>,
    pub rescaled_columns: Vec<String>,
}

/// Stage 3: train the candidates (warm and cold on two threads).
pub fn train(
    owner: &Owner,
    plan: &Plan,
    data: &Data,
    progress: Option<&(dyn Fn(Progress) + Sync)>,
    cancel: Option<&AtomicBool>,
) -> Result<Trained, CycleError> {
    let step = std::time::Instant::now();
    let store = &owner.store;
    let training = &owner.config.training;
    let cold_spec = cold_spec(owner)?;
    // The warm parent takes category values that arrived since its encoding
    // was fixed, with zero weights: the same function, room to learn them.
    // Number columns whose stats moved far are restandardised the same way.
    let warm_parent = match plan.warm_parent() {
        Some((_, _, ck)) => {
            let (wide, added) = ck.model.widened(store.vocabularies())?;
            let (parent, rescaled) =
                wide.rescaled(&store.train_stats()?, training.rescale_threshold)?;
            Some((parent, added, rescaled))
        }
        None => None,
    };
    let name = |c: usize| store.schema().columns[c].name.clone();
    let rescaled_columns: Vec<String> = warm_parent
        .as_ref()
        .map(|(_, _, cols)| cols.iter().map(|c| name(*c)).collect())
        .unwrap_or_default();
    let widened_columns: BTreeMap<String, usize> = warm_parent
        .as_ref()
        .map(|(_, added, _)| added.iter().map(|(c, n)| (name(*c), *n)).collect())
        .unwrap_or_default();
    let control = || Control {
        cancel,
        progress: progress.map(|p| p as &dyn Fn(Progress)),
    };
    let (warm, cold) = std::thread::scope(|scope| {
        let warm = warm_parent.as_ref().map(|(parent, _, _)| {
            let (new_train, older_train) = (&data.new_train, &data.older_train);
            scope.spawn(move || {
                let control = Control {
                    cancel,
                    progress: progress.map(|p| p as &dyn Fn(Progress)),
                };
                train::train_warm(parent, training, new_train, older_train, control)
            })
        });
        let cold = match (&data.all_train, &data.cold_stream) {
            (Some(all), _) => Some(train::train_cold(
                &cold_spec,
                &owner.config.model,
                training,
                all,
                control(),
            )),
            (None, Some((sizes, counts))) => {
                tracing::info!(
                    "cycle {}: the cold candidate streams {} training rows from the store \
                     (memory budget {} MiB): blocks of {} rows, {} blocks shuffled together",
                    plan.cycle,
                    counts.iter().map(|(_, n)| n).sum::<usize>(),
                    owner.config.memory.cycle_mb,
                    sizes.block_rows,
                    sizes.window_blocks
                );
                Some(streaming::train_cold(
                    &cold_spec,
                    &owner.config.model,
                    training,
                    counts,
                    *sizes,
                    owner.config.memory.cycle_mb.ceil() as u64,
                    &StoreRows(store),
                    control(),
                ))
            }
            (None, None) => None,
        };
        (
            warm.map(|h| h.join().expect("training thread does not panic")),
            cold,
        )
    });
    let mut models = Vec::new();
    if let Some(w) = warm {
        let t = w?;
        models.push((RunKind::Warm, t.model, t.summary));
    }
    if let Some(c) = cold {
        let t = c?;
        models.push((RunKind::Cold, t.model, t.summary));
    }
    tracing::debug!(
        "cycle {}: trained {} candidate(s) in {:.3} s (peak RSS {} MB)",
        plan.cycle,
        models.len(),
        step.elapsed().as_secs_f64(),
        peak_rss_mb()
    );
    Ok(Trained {
        models,
        widened_columns,
        rescaled_columns,
    })
}

/// The store as the row source of a streamed cold run: a block is a range
/// of one batch's training rows, read through the chunks that hold them.
struct StoreRows<'a>(&'a crate::store::Store);

impl streaming::Rows for StoreRows<'_> {
    fn block(&self, b: &streaming::Block) -> Result<RowMatrix, String> {
        let positions: Vec<usize> = (b.start..b.start + b.len).collect();
        self.0
            .rows_at(Split::Train, Some(b.batch), Some(b.batch), &positions)
            .map_err(|e| e.to_string())
    }

    fn at(&self, positions: &[usize]) -> Result<RowMatrix, String> {
        self.0
            .rows_at(Split::Train, None, None, positions)
            .map_err(|e| e.to_string())
    }
}

fn cold_spec(owner: &Owner) -> Result<FeatureSpec, StoreError> {
    let store = &owner.store;
    Ok(FeatureSpec::new(
        store.schema(),
        &store.train_stats()?,
        store.vocabularies(),
    ))
}

/// One candidate with its per-row holdout losses.
pub struct ScoredCandidate {
    pub run: RunKind,
    pub model: Model,
    pub summary: TrainingSummary,
    pub losses: Vec<f64>,
    pub loss: f64,
}

/// Every model of the cycle scored on the same holdout rows.
pub struct Scored {
    pub candidates: Vec<ScoredCandidate>,
    /// The serving model's per-row losses (`None` when nothing serves).
    pub serving: Option<Vec<f64>>,
    /// The trivial predictor's per-row losses.
    pub trivial: Vec<f64>,
    pub trivial_loss: f64,
    pub ridge: Result<f64, String>,
    /// The boosted trees, or why they were not fitted.
    pub trees: Result<TreesScore, String>,
    pub widened_columns: BTreeMap<String, usize>,
    pub rescaled_columns: Vec<String>,
}

/// The boosted trees of a cycle on its holdout rows.
pub struct TreesScore {
    pub loss: f64,
    /// Training rows sampled for the fit.
    pub rows: usize,
    /// One-sided p that the trees do better than each candidate (in
    /// `candidates` order) and than the serving model (`trees::p_lower`).
    pub p_candidates: Vec<Option<f64>>,
    pub p_serving: Option<f64>,
}

impl Scored {
    /// Mean loss of what the candidates are judged against.
    pub fn baseline_loss(&self) -> f64 {
        self.serving.as_deref().map_or(self.trivial_loss, mean)
    }
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Stage 4: the candidates, the serving model and the reference models on
/// the same holdout rows. The reference models fit on the warm candidate's
/// training rows (the new ones and the older sample).
pub fn score(
    owner: &Owner,
    plan: &Plan,
    data: &Data,
    trained: Trained,
) -> Result<Scored, CycleError> {
    let step = std::time::Instant::now();
    let store = &owner.store;
    let backend = owner.config.training.predict_backend;
    let n = data.holdout_rows;
    let spec = cold_spec(owner)?;
    let parts = [&data.older_train, &data.new_train];
    // The reference models fit on the training rows first, so that one
    // pass over the holdout scores every model.
    let ridge_fit =
        Ridge::fit(&spec, &parts, owner.config.gate.ridge_lambda).map_err(|e| e.to_string());
    let trees_step = std::time::Instant::now();
    let trees_fit = crate::trees::Boosted::fit(&spec, &parts, &crate::trees::Settings::default())
        .map_err(|e| e.to_string());
    let trees_fit_seconds = trees_step.elapsed().as_secs_f64();
    let networks: Vec<&Model> = trained
        .models
        .iter()
        .map(|(_, m, _)| m)
        .chain(plan.serving.as_ref().map(|(_, _, ck)| &ck.model))
        .collect();
    let mut network_losses: Vec<Vec<f64>> =
        networks.iter().map(|_| Vec::with_capacity(n)).collect();
    let mut trivial = Vec::with_capacity(n);
    let mut ridge_losses = holdout::Losses::new(&ridge_fit, n);
    let mut trees_losses = holdout::Losses::new(&trees_fit, n);
    let mut trees_score_seconds = 0.0;
    if n == 0 {
        // No holdout rows: the trivial predictor still has to be fitted
        // (a store without usable training targets stops the cycle here).
        baseline::trivial_losses(&spec, &parts, &RowMatrix::new(owner.store.schema().width()))
            .map_err(|e| CycleError::Scoring(e.to_string()))?;
    }
    for slice in holdout::slices(n, SCORE_ROWS) {
        let start = slice.start;
        let positions: Vec<usize> = slice.collect();
        let rows = store.rows_at(Split::Holdout, None, None, &positions)?;
        for (model, out) in networks.iter().zip(&mut network_losses) {
            match model.row_losses(&rows, backend) {
                Ok(l) => out.extend(l),
                Err(ModelError::MissingTarget { row }) => {
                    return Err(ModelError::MissingTarget { row: start + row }.into());
                }
                Err(e) => return Err(e.into()),
            }
        }
        trivial.extend(
            baseline::trivial_losses(&spec, &parts, &rows)
                .map_err(|e| CycleError::Scoring(e.to_string()))?,
        );
        if let Ok(r) = &ridge_fit {
            ridge_losses.add(r.row_losses(&rows));
        }
        if let Ok(t) = &trees_fit {
            let at = std::time::Instant::now();
            trees_losses.add(t.row_losses(&rows));
            trees_score_seconds += at.elapsed().as_secs_f64();
        }
    }
    let serving = plan.serving.as_ref().map(|_| {
        network_losses
            .pop()
            .expect("the serving model was scored last")
    });
    let mut candidates = Vec::new();
    for ((run, model, summary), losses) in trained.models.into_iter().zip(network_losses) {
        let loss = mean(&losses);
        candidates.push(ScoredCandidate {
            run,
            model,
            summary,
            losses,
            loss,
        });
    }
    let trivial_loss = mean(&trivial);
    let ridge = ridge_losses.losses.map(|l| mean(&l));
    if let Err(e) = &ridge {
        tracing::warn!("ridge baseline not fitted: {e}");
    }
    let trees = trees_fit
        .and_then(|t| Ok((t.rows(), trees_losses.losses?)))
        .map(|(rows, losses)| {
            let p = |net: &[f64]| crate::trees::p_lower(&losses, net, &data.holdout_batches);
            TreesScore {
                loss: mean(&losses),
                rows,
                p_candidates: candidates.iter().map(|c| p(&c.losses)).collect(),
                p_serving: serving.as_deref().and_then(p),
            }
        });
    match &trees {
        Ok(t) => tracing::debug!(
            "cycle {}: boosted trees fitted on {} rows and scored in {:.3} s",
            plan.cycle,
            t.rows,
            trees_fit_seconds + trees_score_seconds
        ),
        Err(e) => tracing::warn!("boosted trees not fitted: {e}"),
    }
    tracing::debug!(
        "cycle {}: scored {} candidate(s), the serving model and the baselines on {} holdout rows in {:.3} s (peak RSS {} MB)",
        plan.cycle,
        candidates.len(),
        data.holdout_rows,
        step.elapsed().as_secs_f64(),
        peak_rss_mb()
    );
    Ok(Scored {
        candidates,
        serving,
        trivial,
        trivial_loss,
        ridge,
        trees,
        widened_columns: trained.widened_columns,
        rescaled_columns: trained.rescaled_columns,
    })
}

/// Stage 5 (pure): every candidate judged against the serving model (or
/// the trivial predictor for a first model) on the same holdout rows,
/// batches as clusters, Holm-corrected for the number of candidates; the
/// cycle acts on the winner with the lowest loss, else on the best loser.
pub fn judge(scored: &Scored, data: &Data, policy: &gate::Policy) -> gate::Judgement {
    let scores = |losses: &[f64]| {
        Scores::clustered(
            losses.to_vec(),
            data.new_flags.clone(),
            data.holdout_batches.clone(),
        )
    };
    let candidates: Vec<Scores> = scored
        .candidates
        .iter()
        .map(|c| scores(&c.losses))
        .collect();
    match &scored.serving {
        Some(losses) => gate::decide_among(
            gate::Baseline::Serving,
            &scores(losses),
            &candidates,
            policy,
        ),
        None => gate::decide_among(
            gate::Baseline::Trivial,
            &scores(&scored.trivial),
            &candidates,
            policy,
        ),
    }
}

/// Stage 6: save every candidate, log each one's fate and the baselines,
/// move the serving pointer on a promotion (in the same transaction as its
/// entry). A dry run saves and records nothing.
pub fn record(
    owner: &mut Owner,
    plan: &Plan,
    data: &Data,
    scored: Scored,
    judgement: gate::Judgement,
    options: Options,
    user: &str,
) -> Result<Report, CycleError> {
    let step = std::time::Instant::now();
    let cycle = plan.cycle;
    let serving_id = plan.serving_id();
    let baseline_loss = scored.baseline_loss();
    let chosen = judgement.chosen;
    let decision = judgement.decision().clone();
    let ridge_loss = scored.ridge.as_ref().ok().copied();
    let trees_loss = scored.trees.as_ref().ok().map(|t| t.loss);
    let mut serving_after = serving_id;
    let mut candidates = Vec::new();
    if options.dry_run {
        for c in scored.candidates {
            candidates.push(Candidate {
                id: None,
                run: c.run,
                summary: c.summary,
                holdout_loss: c.loss,
            });
        }
    } else {
        let vocabs = owner.store.vocabularies().clone();
        let mut next = owner.store.next_model_id()?;
        let mut ids = Vec::new();
        for c in &scored.candidates {
            let id = next;
            next = next.next();
            let parent = if c.run == RunKind::Warm {
                plan.warm_parent().map(|(id, _, _)| id)
            } else {
                None
            };
            let meta = CheckpointMeta {
                id,
                parent,
                created_at: Utc::now(),
                schema_fingerprint: &plan.fingerprint,
                vocabularies: &vocabs,
            };
            let dir = c.model.save(&owner.state.models(), &c.summary, &meta)?;
            let manifest_hash = std::fs::read(dir.join(checkpoint::MANIFEST_FILE))
                .map(|b| blake3::hash(&b).to_hex().to_string())
                .map_err(|source| StateError::Io {
                    path: dir.clone(),
                    source,
                })?;
            let record = ModelRecord {
                id,
                parent,
                run: c.run,
                trained_through: plan.last,
                cycle,
                holdout_loss: c.loss,
            };
            let warm = c.run == RunKind::Warm;
            let event = Event::CandidateTrained {
                cycle,
                model: id,
                run: run_name(c.run).into(),
                parent,
                trained_through: plan.last,
                epochs: c.summary.epochs,
                seconds: c.summary.seconds,
                stop: format!("{:?}", c.summary.stop),
                holdout_rows: data.holdout_rows,
                holdout_loss: c.loss,
                manifest_hash,
                widened: if warm {
                    scored.widened_columns.clone()
                } else {
                    Default::default()
                },
                rescaled: if warm {
                    scored.rescaled_columns.clone()
                } else {
                    Vec::new()
                },
            };
            let entry = owner.store.record_with_meta(
                event,
                user,
                Utc::now(),
                &[
                    (META_NEXT_MODEL, Some(next.key().to_vec())),
                    (
                        &model_key(id),
                        Some(serde_json::to_vec(&record).expect("record serialises")),
                    ),
                ],
            )?;
            owner.mirror.append(&[entry.line().as_bytes()])?;
            ids.push(id);
        }
        let event = Event::BaselinesScored {
            cycle,
            holdout_rows: data.holdout_rows,
            trivial_loss: scored.trivial_loss,
            ridge_loss,
            ridge_lambda: owner.config.gate.ridge_lambda,
            ridge_problem: scored.ridge.as_ref().err().cloned(),
            serving: serving_id,
            serving_loss: serving_id.map(|_| baseline_loss),
            trees_loss,
            trees_rows: scored.trees.as_ref().ok().map(|t| t.rows),
            trees_problem: scored.trees.as_ref().err().cloned(),
            trees_versus: match &scored.trees {
                Ok(t) => ids
                    .iter()
                    .zip(&scored.candidates)
                    .zip(&t.p_candidates)
                    .map(|((id, c), p)| (*id, c.loss, *p))
                    .chain(serving_id.map(|id| (id, baseline_loss, t.p_serving)))
                    .map(|(model, loss, p)| crate::audit::TreesVersus { model, loss, p })
                    .collect(),
                Err(_) => Vec::new(),
            },
        };
        let entry = owner.store.record_with_meta(event, user, Utc::now(), &[])?;
        owner.mirror.append(&[entry.line().as_bytes()])?;
        for (i, id) in ids.iter().enumerate() {
            let this = &judgement.decisions[i];
            let evidence = this.evidence().map(|e| evidence_of(e, this));
            if i != chosen {
                let reason = if this.candidate_won() {
                    format!(
                        "another candidate of this cycle also passed the gate and scored lower on the \
                         holdout rows ({:.4} against {:.4}); {}",
                        scored.candidates[chosen].loss,
                        scored.candidates[i].loss,
                        this.reason()
                    )
                } else {
                    this.reason()
                };
                let event = Event::Shelved {
                    cycle,
                    model: *id,
                    serving: serving_id,
                    evidence,
                    reason,
                };
                let entry = owner.store.record_with_meta(event, user, Utc::now(), &[])?;
                owner.mirror.append(&[entry.line().as_bytes()])?;
                continue;
            }
            let close = (META_OPEN_CYCLE, None);
            let (event, meta): (Event, Vec<MetaChange<'_>>) = match &decision {
                Decision::Promote { .. } => {
                    serving_after = Some(*id);
                    (
                        Event::Promoted {
                            cycle,
                            model: *id,
                            previous: serving_id,
                            evidence: evidence.expect("a promotion has evidence"),
                        },
                        vec![
                            (META_SERVING, Some(id.key().to_vec())),
                            (crate::fresh::META_MONITOR, None),
                            close,
                        ],
                    )
                }
                Decision::AwaitApproval { .. } => (
                    Event::AwaitingApproval {
                        cycle,
                        model: *id,
                        serving: serving_id,
                        evidence: evidence.expect("a winner has evidence"),
                    },
                    vec![(META_PENDING, Some(id.key().to_vec())), close],
                ),
                Decision::Keep { .. } => (
                    Event::Shelved {
                        cycle,
                        model: *id,
                        serving: serving_id,
                        evidence,
                        reason: decision.reason(),
                    },
                    vec![close],
                ),
            };
            crate::failpoint::hit("cycle:before-promote").map_err(|source| StateError::Io {
                path: owner.state.store(),
                source,
            })?;
            let entry = owner
                .store
                .record_with_meta(event, user, Utc::now(), &meta)?;
            crate::failpoint::hit("cycle:after-promote").map_err(|source| StateError::Io {
                path: owner.state.audit(),
                source,
            })?;
            owner.mirror.append(&[entry.line().as_bytes()])?;
            if let Some(s) = serving_after.filter(|s| Some(*s) != serving_id) {
                crate::fsutil::write_atomic(&owner.state.serving(), format!("{s}\n").as_bytes())
                    .map_err(|source| StateError::Io {
                        path: owner.state.serving(),
                        source,
                    })?;
                crate::export::follow(owner, s, user)?;
            }
        }
        for (c, id) in scored.candidates.into_iter().zip(ids) {
            candidates.push(Candidate {
                id: Some(id),
                run: c.run,
                summary: c.summary,
                holdout_loss: c.loss,
            });
        }
    }
    tracing::debug!(
        "cycle {cycle}: saved and recorded in {:.3} s (peak RSS {} MB)",
        step.elapsed().as_secs_f64(),
        peak_rss_mb()
    );
    // Advice against the best network of the cycle: every candidate and
    // the model that served.
    let trees_better_by = scored.trees.as_ref().ok().and_then(|t| {
        let networks: Vec<(f64, Option<f64>)> = candidates
            .iter()
            .map(|c| c.holdout_loss)
            .zip(t.p_candidates.iter().copied())
            .chain(serving_id.map(|_| (baseline_loss, t.p_serving)))
            .collect();
        crate::trees::best_network_advice(t.loss, &networks).map(|(_, share)| share)
    });
    Ok(Report {
        cycle,
        serving_before: serving_id,
        baseline_loss,
        trivial_loss: scored.trivial_loss,
        ridge_loss,
        trees_loss,
        trees_better_by,
        holdout_rows: data.holdout_rows,
        holdout_batches: data
            .holdout_batches
            .iter()
            .collect::<std::collections::BTreeSet<_>>()
            .len(),
        batches_needed: owner.config.gate.min_holdout_batches.max(2),
        new_batches: plan.new_batches.clone(),
        candidates,
        judged: chosen,
        decisions: judgement.decisions,
        decision,
        serving_after,
        dry_run: options.dry_run,
    })
}

/// Rows scored at a time: a large holdout is never encoded all at once.
const SCORE_ROWS: usize = 65_536;

/// Per-row losses of `model` on `rows`, scored in slices of `SCORE_ROWS`
/// rows so memory stays at one slice's encoded inputs.
pub(crate) fn row_losses(
    model: &Model,
    rows: &crate::schema::RowMatrix,
    backend: crate::config::Backend,
) -> Result<Vec<f64>, ModelError> {
    let n = rows.n_rows();
    if n <= SCORE_ROWS {
        return model.row_losses(rows, backend);
    }
    let w = rows.width();
    let mut out = Vec::with_capacity(n);
    for start in (0..n).step_by(SCORE_ROWS) {
        let end = (start + SCORE_ROWS).min(n);
        let slice =
            crate::schema::RowMatrix::from_cells(w, rows.cells()[start * w..end * w].to_vec());
        match model.row_losses(&slice, backend) {
            Ok(l) => out.extend(l),
            Err(ModelError::MissingTarget { row }) => {
                return Err(ModelError::MissingTarget { row: start + row });
            }
            Err(e) => return Err(e),
        }
    }
    Ok(out)
}

/// Fewest older training rows a cycle samples (all of them when fewer are
/// stored): enough for the baselines' fits to be as good as on every row,
/// few enough to read and encode in well under a second.
pub const OLDER_SAMPLE_MIN: usize = 50_000;

/// Epochs of a warm run whose replayed older rows are all fresh; later
/// epochs draw again from the same sample (each epoch's replay is a uniform
/// draw from it), so a long warm run does not read a cold run's worth of
/// rows into memory.
pub const REPLAY_FRESH_EPOCHS: usize = 10;

/// How many older training rows a cycle reads: a warm run replays
/// `replay_ratio` older rows per new row in each epoch, plus its
/// validation share, so `(min(warm_epochs, REPLAY_FRESH_EPOCHS) + 1)` times
/// one epoch's replay lets the first epochs draw rows they have not seen,
/// and the baselines get at least `OLDER_SAMPLE_MIN`. Capped at the rows
/// stored.
pub fn older_sample_size(
    new_rows: usize,
    older_rows: usize,
    training: &crate::config::TrainingConfig,
) -> usize {
    let per_epoch = (new_rows as f64 * training.replay_ratio).ceil();
    let epochs = training.warm_epochs.min(REPLAY_FRESH_EPOCHS);
    let replay = per_epoch * (epochs as f64 + 1.0);
    let want = if replay.is_finite() && replay < usize::MAX as f64 {
        (replay as usize).max(OLDER_SAMPLE_MIN)
    } else {
        usize::MAX
    };
    want.min(older_rows)
}

/// `ModelId` of a candidate waiting for approval.
pub const META_PENDING: &[u8] = b"pending";

pub fn run_name(run: RunKind) -> &'static str {
    match run {
        RunKind::Warm => "warm",
        RunKind::Cold => "cold",
    }
}

pub(crate) fn model_record(owner: &Owner, id: ModelId) -> Result<ModelRecord, CycleError> {
    let bytes = owner.store.meta_value(&model_key(id))?.ok_or_else(|| {
        CycleError::Store(StoreError::Corrupt {
            path: owner.store.path().to_path_buf(),
            what: format!("serving model {id} has no record"),
        })
    })?;
    serde_json::from_slice(&bytes).map_err(|e| {
        CycleError::Store(StoreError::Corrupt {
            path: owner.store.path().to_path_buf(),
            what: format!("record of {id}: {e}"),
        })
    })
}

/// The gate's numbers in the form the audit log keeps.
pub fn evidence_of(e: &gate::Evidence, decision: &Decision) -> GateEvidence {
    GateEvidence {
        compared_with: match e.baseline {
            gate::Baseline::Serving => "serving".into(),
            gate::Baseline::Trivial => "trivial".into(),
        },
        rows: e.rows,
        mean_loss_compared_with: e.mean_loss_baseline,
        mean_loss_candidate: e.mean_loss_candidate,
        relative_improvement: e.relative_improvement,
        t: e.test.t.is_finite().then_some(e.test.t),
        p: e.p,
        batches: Some(e.batches),
        batches_needed: Some(e.batches_needed),
        candidates: Some(e.candidates),
        p_unadjusted: (e.candidates > 1).then_some(e.test.p_greater),
        wilcoxon_p: e.wilcoxon_p,
        new_rows: e.new_rows.rows,
        old_rows: e.old_rows.rows,
        reason: decision.reason(),
    }
}

/// The process's peak resident memory so far in MB (Linux), for the step
/// lines of the debug log; 0 where it cannot be read.
fn peak_rss_mb() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find_map(|l| l.strip_prefix("VmHWM:"))
                .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<u64>().ok())
        })
        .map_or(0, |kb| kb / 1024)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{Backend, ModelConfig, Task, TrainingConfig};
    use crate::model::{TargetScale, test_spec};
    use crate::schema::{RowMatrix, number_cell};

    #[test]
    fn the_older_sample_covers_replay_and_the_baselines_and_no_more() {
        let t = TrainingConfig::default();
        // A small store: every older row.
        assert_eq!(older_sample_size(1_000, 30_000, &t), 30_000);
        // Few new rows: the baselines' floor.
        assert_eq!(older_sample_size(1_000, 5_000_000, &t), OLDER_SAMPLE_MIN);
        // Many new rows: a fresh replay sample for each of the first epochs
        // and validation, never one for every epoch of a long warm run.
        let epochs = t.warm_epochs.min(REPLAY_FRESH_EPOCHS);
        let want = (8_000.0 * t.replay_ratio) as usize * (epochs + 1);
        assert!(want > OLDER_SAMPLE_MIN);
        assert_eq!(older_sample_size(8_000, 5_000_000, &t), want);
        let long = TrainingConfig {
            warm_epochs: 500,
            ..t.clone()
        };
        assert_eq!(older_sample_size(8_000, 5_000_000, &long), want);
        let half = TrainingConfig {
            replay_ratio: 0.5,
            ..t.clone()
        };
        assert_eq!(
            older_sample_size(20_000, 5_000_000, &half),
            10_000 * (epochs + 1)
        );
        let none = TrainingConfig {
            replay_ratio: 0.0,
            ..t
        };
        assert_eq!(
            older_sample_size(20_000, 5_000_000, &none),
            OLDER_SAMPLE_MIN
        );
    }

    #[test]
    fn holdout_losses_scored_in_slices_match_one_pass() {
        let spec = test_spec(2, Task::Regression, 1);
        let config = ModelConfig {
            hidden: vec![8],
            ..ModelConfig::default()
        };
        let model = Model::new(spec, &config, TargetScale::IDENTITY, Backend::Flex, 5).unwrap();
        let n = SCORE_ROWS + 1_000;
        let mut rows = RowMatrix::with_capacity(3, n);
        for i in 0..n {
            let a = (i % 97) as f32 / 10.0;
            let b = (i % 31) as f32 / 7.0;
            rows.push_row(&[
                number_cell(Some(a)),
                number_cell(Some(b)),
                number_cell(Some(a - b)),
            ]);
        }
        let sliced = row_losses(&model, &rows, Backend::Flex).unwrap();
        assert_eq!(sliced.len(), n);
        // Each slice alone, scored in one pass, gives the same numbers.
        let w = rows.width();
        let tail = RowMatrix::from_cells(w, rows.cells()[SCORE_ROWS * w..].to_vec());
        let direct = model.row_losses(&tail, Backend::Flex).unwrap();
        assert_eq!(&sliced[SCORE_ROWS..], &direct[..]);
        let head = RowMatrix::from_cells(w, rows.cells()[..SCORE_ROWS * w].to_vec());
        let direct = model.row_losses(&head, Backend::Flex).unwrap();
        assert_eq!(&sliced[..SCORE_ROWS], &direct[..]);
        // Rows repeat every 97 × 31 rows, and so do their losses across
        // the slice border (to float rounding).
        let period = 97 * 31;
        let (a, b) = (sliced[SCORE_ROWS + 5], sliced[SCORE_ROWS + 5 - 21 * period]);
        assert!((a - b).abs() <= 1e-5 * a.abs().max(1e-3), "{a} {b}");
    }
}
