//! The fresh-data check, run on every accepted batch before anything trains
//! on it. The batch's rows are new to every model, so they are a fair test.
//! Rows of one file share a day, so every judgement here takes the batch,
//! not the row, as the unit:
//!
//! - **new conditions**: rows carrying a category value the serving model
//!   (or its predecessor) has never seen (the first Sunday, a new shop) are
//!   set apart and reported; they say nothing about whether a model got
//!   worse or the data moved, only that it meets something new.
//! - **regression**: when the serving model came to serve by promotion or
//!   approval, it and the model it replaced score the other rows; the
//!   batch's mean difference joins the evidence of earlier batches of the
//!   serving model's service ([`gate::monitor`], an anytime-valid
//!   e-process). Once the evidence reaches 1 / alpha the replaced model
//!   serves again (an automatic rollback, never in approval mode or with
//!   `auto_rollback = false`): the chance of a false rollback over the
//!   model's whole service life stays at or below alpha.
//! - **shift**: the serving model's loss level on the batch against the
//!   levels earlier batches showed, and each category value's loss against
//!   the other values of its column on the same batch ([`gate::shift`]).
//!   A shift is a reason to look and to retrain, never a rollback.
//!
//! What the checks remember between batches lives in the store's meta tree,
//! written in the same transaction as the `fresh-checked` entry: the
//! serving model's monitor ([`META_MONITOR`], removed whenever the serving
//! model changes), the recent loss levels ([`META_LEVELS`]), the recent
//! excesses of each value of a small category column
//! ([`META_VALUE_LEVELS`]) and the last batch checked ([`META_CHECKED`]). A batch stored after that one which the
//! serving model has not trained on missed its check (a crash between the
//! commit and the check, or a failure in between); every owner's start runs
//! the missing checks ([`run_missing`]).
//!
//! A failure to write the check's entry or the rollback (store, audit log,
//! serving file) is fatal to the caller ([`FreshError::is_fatal`]): the
//! store's transaction may have committed in memory while the entry's
//! sequence number did not advance, so going on could reuse it.

use chrono::Utc;

use std::collections::BTreeMap;

use crate::audit::{Entry, Event, FreshEvidence, Hotspot};
use crate::config::ColumnKind;
use crate::cycle::{CycleError, model_record};
use crate::gate::monitor::{self, Observation, Prior};
use crate::gate::shift::{self, Group, LEVEL_HISTORY};
use crate::ids::{BatchId, ModelId};
use crate::lifecycle::{self, DecisionError};
use crate::model::{Model, ModelError};
use crate::rng::Rng;
use crate::sample;
use crate::schema::{InputEncoding, RowMatrix, Schema, Vocabularies};
use crate::state::Owner;
use crate::store::{MetaChange, Split, StoreError};

#[derive(Debug, thiserror::Error)]
pub enum FreshError {
    #[error(transparent)]
    Cycle(#[from] CycleError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Model(#[from] ModelError),
    #[error(transparent)]
    Decision(#[from] DecisionError),
    #[error(transparent)]
    Audit(#[from] crate::audit::MirrorError),
}

impl FreshError {
    /// Whether the error came from writing the store, the audit log or the
    /// state dir, after which the process must stop (as in the cycle).
    /// Otherwise a model could not be loaded or scored: nothing was written,
    /// the batch stays stored and the failure is reported.
    pub fn is_fatal(&self) -> bool {
        match self {
            FreshError::Store(_) | FreshError::Audit(_) => true,
            FreshError::Cycle(e) => matches!(
                e,
                CycleError::Store(_) | CycleError::State(_) | CycleError::Audit(_)
            ),
            FreshError::Decision(e) => matches!(
                e,
                DecisionError::Store(_) | DecisionError::State(_) | DecisionError::Audit(_)
            ),
            FreshError::Model(_) => false,
        }
    }
}

/// Meta key of the serving model's monitor (see [`MonitorState`]).
pub const META_MONITOR: &[u8] = b"fresh/monitor";
/// Meta key of the recent loss levels of batches that were not flagged.
pub const META_LEVELS: &[u8] = b"fresh/levels";
/// Meta key of the recent excesses of each value of a small category
/// column over the rest of its column (see [`shift::group_check`]), kept
/// when the value was not flagged.
pub const META_VALUE_LEVELS: &[u8] = b"fresh/value-levels";
/// The encoded [`META_VALUE_LEVELS`] stays under this many bytes (older
/// excesses are dropped first), far below sled's blob threshold.
pub const VALUE_LEVELS_MAX_BYTES: usize = 48 * 1024;
/// Meta key of the batches the check flagged as shifted: their holdout
/// rows stay out of later checks' reference, so a change is compared with
/// how things were before it, not with itself.
pub const META_SHIFTED: &[u8] = b"fresh/shifted";
/// Meta key of the highest `BatchId` whose check has run (its entry is in
/// the same transaction).
pub const META_CHECKED: &[u8] = b"fresh/checked";
/// Observations one monitor keeps (about seven years of nightly files):
/// with 24 bytes each the value stays under sled's 64 KiB.
pub const MONITOR_MAX_BATCHES: usize = 2_500;

/// What the check found and did.
#[derive(Debug, Clone)]
pub struct Outcome {
    pub evidence: FreshEvidence,
    pub entry: Entry,
    /// The automatic rollback's entry, when one happened.
    pub rollback: Option<Entry>,
}

impl Outcome {
    pub fn verdict(&self) -> &str {
        &self.evidence.verdict
    }
}

/// The serving model's monitor: which pair it compares, the plug-ins fixed
/// when it started, and one observation per checked batch.
#[derive(Debug, Clone, PartialEq)]
pub struct MonitorState {
    pub serving: ModelId,
    /// `None`: the serving model has no predecessor to be compared with
    /// (first model, or back by a rollback).
    pub previous: Option<ModelId>,
    pub prior: Prior,
    pub observations: Vec<Observation>,
}

impl MonitorState {
    /// Binary layout: serving id (8), previous id (8, 0 = none), τ² (f64),
    /// the layout's version ([`MONITOR_LAYOUT`], u64), then x, w, ln
    /// numerator per observation (f64 each).
    pub fn encode(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(MONITOR_HEADER + 24 * self.observations.len());
        out.extend_from_slice(&self.serving.key());
        out.extend_from_slice(&self.previous.map_or([0; 8], |p| p.key()));
        out.extend_from_slice(&self.prior.tau2.to_le_bytes());
        out.extend_from_slice(&MONITOR_LAYOUT.to_le_bytes());
        let skip = self.observations.len().saturating_sub(MONITOR_MAX_BATCHES);
        for o in &self.observations[skip..] {
            for v in [o.x, o.w, o.log_numerator] {
                out.extend_from_slice(&v.to_le_bytes());
            }
        }
        out
    }

    /// `None` for bytes of another layout. A state written before the
    /// monitor observed log loss ratios (a 40-byte header: θ, floor and τ²
    /// of loss differences) does not decode: its observations are in other
    /// units, so the monitor starts afresh from the log
    /// ([`compared_with`]), which also knows a model back by a rollback.
    pub fn decode(bytes: &[u8]) -> Option<MonitorState> {
        if bytes.len() < MONITOR_HEADER || !(bytes.len() - MONITOR_HEADER).is_multiple_of(24) {
            return None;
        }
        let f = |at: usize| -> f64 {
            f64::from_le_bytes(bytes[at..at + 8].try_into().expect("8 bytes"))
        };
        let layout = u64::from_le_bytes(bytes[24..32].try_into().expect("8 bytes"));
        if layout != MONITOR_LAYOUT {
            return None;
        }
        let serving = ModelId::from_key(&bytes[0..8])?;
        let previous = ModelId::from_key(&bytes[8..16]).filter(|p| p.0 != 0);
        let observations = (MONITOR_HEADER..bytes.len())
            .step_by(24)
            .map(|at| Observation {
                x: f(at),
                w: f(at + 8),
                log_numerator: f(at + 16),
            })
            .collect();
        Some(MonitorState {
            serving,
            previous,
            prior: Prior { tau2: f(16) },
            observations,
        })
    }
}

/// Version of the monitor's stored layout: 2 since the monitor observes
/// log loss ratios.
const MONITOR_LAYOUT: u64 = 2;
/// Bytes before the observations.
const MONITOR_HEADER: usize = 32;

fn encode_levels(levels: &[f64]) -> Vec<u8> {
    let skip = levels.len().saturating_sub(LEVEL_HISTORY);
    levels[skip..]
        .iter()
        .flat_map(|v| v.to_le_bytes())
        .collect()
}

/// Encodes each value's recent excesses: per entry, the column and value
/// names (u16 length + UTF-8) and the excesses (u16 count + f32 each),
/// keeping the newest [`LEVEL_HISTORY`] per value, fewer if the whole
/// would pass `max_bytes`.
fn encode_value_levels(history: &shift::ValueHistory, max_bytes: usize) -> Vec<u8> {
    let mut keep = LEVEL_HISTORY;
    loop {
        let mut out = Vec::new();
        for ((column, value), excesses) in history {
            let (c, v) = (column.as_bytes(), value.as_bytes());
            if c.len() > usize::from(u16::MAX) || v.len() > usize::from(u16::MAX) {
                continue;
            }
            let skip = excesses.len().saturating_sub(keep);
            let kept = &excesses[skip..];
            out.extend((c.len() as u16).to_le_bytes());
            out.extend(c);
            out.extend((v.len() as u16).to_le_bytes());
            out.extend(v);
            out.extend((kept.len() as u16).to_le_bytes());
            for x in kept {
                out.extend((*x as f32).to_le_bytes());
            }
        }
        if out.len() <= max_bytes || keep <= shift::LEVEL_MIN_HISTORY {
            return out;
        }
        keep -= 1;
    }
}

/// Reads what [`encode_value_levels`] wrote; a damaged tail is dropped.
fn decode_value_levels(bytes: &[u8]) -> shift::ValueHistory {
    let mut out = shift::ValueHistory::new();
    let mut at = 0usize;
    let take = |at: &mut usize, n: usize| -> Option<&[u8]> {
        let s = bytes.get(*at..at.checked_add(n)?)?;
        *at += n;
        Some(s)
    };
    let len = |at: &mut usize| -> Option<usize> {
        take(at, 2).map(|b| usize::from(u16::from_le_bytes([b[0], b[1]])))
    };
    while at < bytes.len() {
        let Some(entry) = (|| {
            let n = len(&mut at)?;
            let column = String::from_utf8(take(&mut at, n)?.to_vec()).ok()?;
            let n = len(&mut at)?;
            let value = String::from_utf8(take(&mut at, n)?.to_vec()).ok()?;
            let n = len(&mut at)?;
            let excesses: Vec<f64> = take(&mut at, 4 * n)?
                .chunks_exact(4)
                .map(|b| f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]])))
                .collect();
            Some(((column, value), excesses))
        })() else {
            break;
        };
        out.insert(entry.0, entry.1);
    }
    out
}

fn encode_batches(batches: &[u64]) -> Vec<u8> {
    batches.iter().flat_map(|v| v.to_be_bytes()).collect()
}

fn decode_batches(bytes: &[u8]) -> Vec<u64> {
    bytes
        .chunks_exact(8)
        .map(|b| u64::from_be_bytes(b.try_into().expect("8 bytes")))
        .collect()
}

fn decode_levels(bytes: &[u8]) -> Vec<f64> {
    bytes
        .chunks_exact(8)
        .map(|b| f64::from_le_bytes(b.try_into().expect("8 bytes")))
        .filter(|v| v.is_finite())
        .collect()
}

/// Rows of `rows` whose category values `model` was built with: each
/// one-hot input knows codes below its width. Returns the mask and, per
/// column, the values it did not know.
fn known_rows(
    rows: &RowMatrix,
    models: &[&Model],
    schema: &Schema,
    vocabs: &Vocabularies,
) -> (Vec<bool>, BTreeMap<String, Vec<String>>) {
    let mut known = vec![true; rows.n_rows()];
    let mut unseen: BTreeMap<String, std::collections::BTreeSet<u32>> = BTreeMap::new();
    for model in models {
        for input in &model.spec().inputs {
            if let InputEncoding::OneHot { column, width } = input {
                for (r, k) in known.iter_mut().enumerate() {
                    if let Some(code) = rows.code(r, *column)
                        && code as usize >= *width
                    {
                        *k = false;
                        unseen
                            .entry(schema.columns[*column].name.clone())
                            .or_default()
                            .insert(code);
                    }
                }
            }
        }
    }
    let named = unseen
        .into_iter()
        .map(|(name, codes)| {
            let col = schema
                .columns
                .iter()
                .position(|c| c.name == name)
                .unwrap_or(0);
            let values = codes
                .into_iter()
                .map(|code| {
                    vocabs
                        .get(&col)
                        .and_then(|v| v.value(code))
                        .map_or_else(|| format!("#{code}"), str::to_string)
                })
                .collect();
            (name, values)
        })
        .collect();
    (known, named)
}

/// The monitor the store keeps for `serving` (`None` when the kept one
/// belongs to another model, or none is kept yet).
pub fn stored_monitor(
    store: &crate::store::Store,
    serving: ModelId,
) -> Result<Option<MonitorState>, StoreError> {
    Ok(store
        .meta_value(META_MONITOR)?
        .and_then(|v| MonitorState::decode(&v))
        .filter(|m| m.serving == serving))
}

/// The model `serving` is compared with: the pair of its monitor, kept in
/// the store while it serves, or when the monitor starts the model it
/// replaced by promotion or approval.
pub fn compared_with(
    owner: &Owner,
    serving: ModelId,
    stored: Option<&MonitorState>,
) -> Result<Option<ModelId>, DecisionError> {
    match stored {
        Some(m) => Ok(m.previous),
        None => lifecycle::replaced_by_promotion(owner, serving),
    }
}

/// Runs the check on `batch` (just accepted). `None` when no model serves,
/// the serving model has already trained on the batch, or the batch is set
/// aside.
pub fn check_batch(
    owner: &mut Owner,
    batch: BatchId,
    user: &str,
) -> Result<Option<Outcome>, FreshError> {
    crate::failpoint::hit("fresh:before-check").map_err(|source| StoreError::Io {
        path: owner.store.path().to_path_buf(),
        source,
    })?;
    // A batch set aside is not evidence about any model.
    if owner.store.set_aside_batches().contains(&batch) {
        return Ok(None);
    }
    let Some(serving) = owner.store.serving()? else {
        return Ok(None);
    };
    let record = model_record(owner, serving)?;
    if record.trained_through >= batch {
        return Ok(None);
    }
    let gate_config = owner.config.gate.clone();
    let alpha = gate_config.alpha;
    let backend = owner.config.training.predict_backend;
    let load = |id: ModelId| owner.checkpoint(id);

    let stored = stored_monitor(&owner.store, serving)?;
    let previous = compared_with(owner, serving, stored.as_ref())?;
    let serving_model = load(serving)?.model;
    // A predecessor whose checkpoint is gone or damaged cannot be compared
    // (nor rolled back to); say so rather than fail intake.
    let mut reasons = Vec::new();
    let previous_model = match previous {
        Some(p) => match load(p) {
            Ok(ck) => Some((p, ck.model)),
            Err(e) => {
                reasons.push(format!("{p} not compared: {e}"));
                None
            }
        },
        None => {
            reasons.push(format!(
                "no predecessor to compare: {serving} did not replace a model by promotion or approval"
            ));
            None
        }
    };

    let mut all = owner.store.rows(Split::Train, Some(batch), Some(batch))?;
    all.extend(&owner.store.rows(Split::Holdout, Some(batch), Some(batch))?);
    let schema = owner.store.schema().clone();
    let vocabs = owner.store.vocabularies().clone();
    let mut models: Vec<&Model> = vec![&serving_model];
    if let Some((_, m)) = &previous_model {
        models.push(m);
    }
    let (known, new_conditions) = known_rows(&all, &models, &schema, &vocabs);
    let picked: Vec<usize> = (0..all.n_rows()).filter(|&r| known[r]).collect();
    let rows = if picked.len() == all.n_rows() {
        all.clone()
    } else {
        all.select(&picked)
    };
    let new_condition_rows = all.n_rows() - rows.n_rows();

    let mut evidence = FreshEvidence {
        batch,
        rows: all.n_rows(),
        serving,
        verdict: "untested".into(),
        tested_rows: Some(rows.n_rows()),
        new_conditions: new_conditions.clone(),
        new_condition_rows,
        mean_loss_serving: None,
        mean_loss_reference: None,
        p_shift: None,
        level: None,
        p_level: None,
        level_history: 0,
        shifted_values: Vec::new(),
        previous: previous_model.as_ref().map(|(p, _)| *p),
        mean_loss_previous: None,
        t: None,
        p_regression: None,
        evidence: None,
        evidence_needed: None,
        monitored_batches: 0,
        hotspots: Vec::new(),
        reason: String::new(),
    };
    if new_condition_rows > 0 {
        let named: Vec<String> = new_conditions
            .iter()
            .map(|(c, v)| format!("{c} = {}", v.join(", ")))
            .collect();
        reasons.insert(
            0,
            format!(
                "new conditions: {new_condition_rows} of {} rows carry values the models have \
                 never seen ({}); reported, not tested",
                all.n_rows(),
                named.join("; ")
            ),
        );
    }
    let mut meta: Vec<(Vec<u8>, Option<Vec<u8>>)> = Vec::new();
    let mut regressed = false;
    let mut shifted = false;
    if rows.n_rows() < gate_config.fresh_min_rows.max(2) {
        reasons.push(format!(
            "{} rows to test, fewer than fresh_min_rows = {}",
            rows.n_rows(),
            gate_config.fresh_min_rows
        ));
        evidence.verdict = if new_condition_rows > 0 {
            "new-conditions"
        } else {
            "untested"
        }
        .into();
    } else {
        // Regression: the signed errors too, for the small columns' shift
        // test; the losses are their squares (one pass over the batch).
        let errors = serving_model.row_errors(&rows, backend)?;
        let fresh = match &errors {
            Some(e) => e.iter().map(|x| x * x).collect(),
            None => serving_model.row_losses(&rows, backend)?,
        };
        let fresh_mean = mean(&fresh);
        evidence.mean_loss_serving = Some(fresh_mean);
        let step = std::time::Instant::now();
        // The reference is every earlier batch's holdout rows (none of them
        // trained on): the more rows, the less the usual loss of one
        // category value wobbles.
        let mut shifted_batches = owner
            .store
            .meta_value(META_SHIFTED)?
            .map(|v| decode_batches(&v))
            .unwrap_or_default();
        let (reference_rows, reference_batches) =
            reference_rows(owner, BatchId(batch.0.saturating_sub(1)), &shifted_batches)?;
        let reference = serving_model.row_losses(&reference_rows, backend)?;
        tracing::debug!(
            "batch {batch}: fresh-data check scored {} reference rows in {:.3} s",
            reference_rows.n_rows(),
            step.elapsed().as_secs_f64()
        );
        let reference_mean = mean(&reference);
        evidence.mean_loss_reference = (!reference.is_empty()).then_some(reference_mean);

        // Shift, overall: this batch's level against earlier batches'.
        let mut levels = owner
            .store
            .meta_value(META_LEVELS)?
            .map(|v| decode_levels(&v))
            .unwrap_or_default();
        let level =
            (fresh_mean > 0.0 && reference_mean > 0.0).then(|| (fresh_mean / reference_mean).ln());
        evidence.level = level;
        evidence.level_history = levels.len().min(LEVEL_HISTORY);
        let level_check =
            level.and_then(|l| shift::level_check(&levels, l, gate_config.shift_alpha));
        match &level_check {
            Some(c) => {
                evidence.p_level = Some(c.p);
                shifted |= c.flagged;
                reasons.push(format!(
                    "shift: {}{}",
                    c.reason(),
                    if c.flagged { ": flagged" } else { "" }
                ));
            }
            None => reasons.push(format!(
                "shift: {} earlier batches, {} needed before the loss level is judged",
                levels.len(),
                shift::LEVEL_MIN_HISTORY
            )),
        }
        // Shift, in part: values out of line with the rest of their column.
        let groups = groups(
            &schema,
            &vocabs,
            (&rows, &fresh, errors.as_deref()),
            (&reference_rows, &reference),
        );
        let mut value_history = owner
            .store
            .meta_value(META_VALUE_LEVELS)?
            .map(|v| decode_value_levels(&v))
            .unwrap_or_default();
        let group_check = shift::group_check(&groups, &value_history, gate_config.shift_alpha);
        if group_check.remember(&mut value_history) {
            meta.push((
                META_VALUE_LEVELS.to_vec(),
                Some(encode_value_levels(&value_history, VALUE_LEVELS_MAX_BYTES)),
            ));
        }
        if !group_check.flagged.is_empty() {
            shifted = true;
            evidence.shifted_values = group_check
                .flagged
                .iter()
                .map(|f| format!("{} = {}", f.column, f.value))
                .collect();
            reasons.push(format!(
                "shift in part: {} of {} values tested cost far more than usual beside the rest \
                 of their column: {}",
                group_check.flagged.len(),
                group_check.tested,
                group_check
                    .flagged
                    .iter()
                    .map(shift::GroupFlag::reason)
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
        }
        if let Some(l) = level
            && !shifted
        {
            levels.push(l);
            meta.push((META_LEVELS.to_vec(), Some(encode_levels(&levels))));
        }
        if shifted {
            shifted_batches.push(batch.0);
            meta.push((
                META_SHIFTED.to_vec(),
                Some(encode_batches(&shifted_batches)),
            ));
        }
        evidence.hotspots = hotspots(
            &schema,
            &vocabs,
            (&rows, &fresh),
            (&reference_rows, &reference),
        );

        // Regression: the monitor of the serving model against its
        // predecessor.
        if let Some((p, old_model)) = &previous_model {
            let mut state = match stored {
                Some(s) if s.previous == Some(*p) => s,
                _ => {
                    let old_reference = old_model.row_losses(&reference_rows, backend)?;
                    // The day-to-day variance comes from the same kind of
                    // rows the monitor will test: those whose category
                    // values both models know. On rows of a weekday or a
                    // shop neither has seen, two versions of a model can
                    // differ wildly, and that spread would hide any real
                    // regression on the rows that are tested.
                    let (known_ref, _) = known_rows(&reference_rows, &models, &schema, &vocabs);
                    let keep = |v: &[f64]| -> Vec<f64> {
                        v.iter()
                            .zip(&known_ref)
                            .filter(|(_, k)| **k)
                            .map(|(x, _)| *x)
                            .collect()
                    };
                    let known_batches: Vec<u64> = reference_batches
                        .iter()
                        .zip(&known_ref)
                        .filter(|(_, k)| **k)
                        .map(|(b, _)| *b)
                        .collect();
                    let old_known = keep(&old_reference);
                    let per_batch =
                        batch_differences(&keep(&reference), &old_known, &known_batches);
                    let tau2 = monitor::between_batch_variance(&per_batch).unwrap_or(0.0);
                    MonitorState {
                        serving,
                        previous: Some(*p),
                        prior: Prior::new(tau2),
                        observations: Vec::new(),
                    }
                }
            };
            let old = old_model.row_losses(&rows, backend)?;
            let (x, w) = log_ratio_and_variance(&fresh, &old);
            if x.is_finite() && w.is_finite() {
                let o = monitor::observe(&state.prior, &state.observations, x, w);
                state.observations.push(o);
                let reading = monitor::read(&state.prior, &state.observations, alpha);
                evidence.mean_loss_previous = Some(mean(&old));
                evidence.evidence = Some(reading.evidence).filter(|e| e.is_finite());
                evidence.evidence_needed = Some(reading.needed);
                evidence.monitored_batches = reading.batches;
                regressed = reading.regressed;
                reasons.push(format!("against {p}: {}", reading.reason()));
            } else {
                reasons.push(format!("against {p}: losses not finite, not compared"));
            }
            meta.push((META_MONITOR.to_vec(), Some(state.encode())));
        } else if stored.is_none() {
            // Remember that this model has nothing to be compared with, so
            // later batches need not look it up again.
            let state = MonitorState {
                serving,
                previous: None,
                prior: Prior::new(0.0),
                observations: Vec::new(),
            };
            meta.push((META_MONITOR.to_vec(), Some(state.encode())));
        }
        evidence.verdict = if regressed {
            "regressed"
        } else if shifted {
            "shifted"
        } else if level_check.is_some() || previous_model.is_some() || group_check.tested > 0 {
            "steady"
        } else if new_condition_rows > 0 {
            "new-conditions"
        } else {
            "untested"
        }
        .into();
    }
    evidence.reason = reasons.join("; ");
    let checked = last_checked(owner)?.map_or(batch, |c| c.max(batch));
    meta.push((META_CHECKED.to_vec(), Some(checked.key().to_vec())));

    let changes: Vec<MetaChange<'_>> = meta.iter().map(|(k, v)| (&k[..], v.clone())).collect();
    let entry = owner.store.record_with_meta(
        Event::FreshChecked {
            check: evidence.clone(),
        },
        user,
        Utc::now(),
        &changes,
    )?;
    owner.mirror.append(&[entry.line().as_bytes()])?;
    let mut rollback = None;
    if regressed
        && gate_config.auto_rollback
        && !gate_config.require_approval
        && let Some(to) = evidence.previous
    {
        rollback = Some(lifecycle::rollback_automatic(
            owner,
            serving,
            to,
            evidence.clone(),
            user,
        )?);
    }
    Ok(Some(Outcome {
        evidence,
        entry,
        rollback,
    }))
}

/// The highest batch whose check ran: the store's marker, or for a store
/// written before the marker existed, the newest `fresh-checked` entry of
/// the log (read once: the next check writes the marker).
fn last_checked(owner: &Owner) -> Result<Option<BatchId>, FreshError> {
    if let Some(v) = owner.store.meta_value(META_CHECKED)? {
        return Ok(BatchId::from_key(&v));
    }
    let mut last = None;
    for (_, line) in owner.store.audit_entries()? {
        // Most lines are other events: skip them without parsing.
        if !line.windows(13).any(|w| w == b"fresh-checked") {
            continue;
        }
        if let Ok(Entry {
            event: Event::FreshChecked { check },
            ..
        }) = Entry::from_line(&line)
        {
            last = last.max(Some(check.batch));
        }
    }
    Ok(last)
}

/// Batches that missed their check: stored after the last checked batch,
/// while a model serves that has not trained on them.
pub fn missing(owner: &Owner) -> Result<Vec<BatchId>, FreshError> {
    let next = owner.store.next_batch_id();
    let Some(serving) = owner.store.serving()? else {
        return Ok(Vec::new());
    };
    let trained = model_record(owner, serving)?.trained_through;
    if next.0 <= trained.0 + 1 {
        return Ok(Vec::new());
    }
    let checked = last_checked(owner)?.map_or(0, |b| b.0);
    Ok((trained.0.max(checked) + 1..next.0).map(BatchId).collect())
}

/// Runs the checks that [`missing`] finds, in batch order; returns how
/// many ran. A check that cannot run (a model that does not load) is
/// reported and skipped; a failure to write is returned.
pub fn run_missing(owner: &mut Owner, user: &str) -> Result<usize, FreshError> {
    let mut ran = 0;
    for batch in missing(owner)? {
        match check_batch(owner, batch, user) {
            Ok(found) => {
                ran += 1;
                if let Some(found) = found {
                    tracing::info!(
                        "batch {batch}: fresh-data check missed before, run now: {}",
                        found.verdict()
                    );
                    if let Some(r) = &found.rollback {
                        tracing::warn!("batch {batch}: {}", r.event.summary());
                    }
                }
            }
            Err(e) if !e.is_fatal() => {
                tracing::warn!("batch {batch}: the fresh-data check could not run: {e}")
            }
            Err(e) => return Err(e),
        }
    }
    Ok(ran)
}

/// Mean of `d` and the variance of that mean (s² / n; 0 for one value).
fn mean_and_variance_of_mean(d: &[f64]) -> (f64, f64) {
    let n = d.len();
    if n == 0 {
        return (f64::NAN, f64::NAN);
    }
    let m = mean(d);
    if n < 2 {
        return (m, 0.0);
    }
    let s2 = d.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1) as f64;
    (m, s2 / n as f64)
}

/// ln(mean serving loss / mean previous loss) over paired rows, and the
/// variance of that log ratio from the rows (delta method: the variance of
/// the mean of s_i/S − p_i/P). NaN when either mean loss is not positive.
fn log_ratio_and_variance(serving: &[f64], previous: &[f64]) -> (f64, f64) {
    let (s, p) = (mean(serving), mean(previous));
    if !(s > 0.0 && p > 0.0 && s.is_finite() && p.is_finite()) {
        return (f64::NAN, f64::NAN);
    }
    let u: Vec<f64> = serving
        .iter()
        .zip(previous)
        .map(|(a, b)| a / s - b / p)
        .collect();
    ((s / p).ln(), mean_and_variance_of_mean(&u).1)
}

/// (log loss ratio, its variance) of serving against previous per batch.
fn batch_differences(serving: &[f64], previous: &[f64], batches: &[u64]) -> Vec<(f64, f64)> {
    let mut by_batch: BTreeMap<u64, (Vec<f64>, Vec<f64>)> = BTreeMap::new();
    for ((s, p), b) in serving.iter().zip(previous).zip(batches) {
        let e = by_batch.entry(*b).or_default();
        e.0.push(*s);
        e.1.push(*p);
    }
    by_batch
        .values()
        .filter(|(s, _)| s.len() >= 2)
        .map(|(s, p)| log_ratio_and_variance(s, p))
        .filter(|(m, w)| m.is_finite() && w.is_finite())
        .collect()
}

/// Most stored holdout rows the check scores as its reference: a uniform
/// sample of this many (all when fewer are stored) pins the reference mean
/// loss far more tightly than a batch's rows pin theirs, and keeps the
/// check's cost per batch flat as the store grows.
pub const MAX_REFERENCE_ROWS: usize = 50_000;

/// The holdout rows of batches up to `through` except those in `skip`, or
/// a uniform sample of `MAX_REFERENCE_ROWS` of them (the same for the same
/// seed and batches), with the batch of each row.
fn reference_rows(
    owner: &Owner,
    through: BatchId,
    skip: &[u64],
) -> Result<(RowMatrix, Vec<u64>), StoreError> {
    let store = &owner.store;
    let counts = store.split_counts(Split::Holdout, None, Some(through))?;
    let labels: Vec<u64> = counts
        .iter()
        .flat_map(|(b, n)| std::iter::repeat_n(b.0, *n))
        .collect();
    let skip: std::collections::BTreeSet<u64> = skip.iter().copied().collect();
    let kept: Vec<usize> = (0..labels.len())
        .filter(|&i| !skip.contains(&labels[i]))
        .collect();
    if kept.len() == labels.len() && labels.len() <= MAX_REFERENCE_ROWS {
        return Ok((store.rows(Split::Holdout, None, Some(through))?, labels));
    }
    let picks: Vec<usize> = if kept.len() <= MAX_REFERENCE_ROWS {
        kept
    } else {
        let seed = sample::seed_for(
            owner.config.training.seed,
            &[&b"fresh-reference/"[..], &through.key()].concat(),
        );
        sample::choose(kept.len(), MAX_REFERENCE_ROWS, &mut Rng::new(seed))
            .into_iter()
            .map(|i| kept[i])
            .collect()
    };
    let rows = store.rows_at(Split::Holdout, None, Some(through), &picks)?;
    Ok((rows, picks.iter().map(|&i| labels[i]).collect()))
}

/// The text of category code `code` of column `col` ("?" when unknown).
fn value_name(vocabs: &Vocabularies, col: usize, code: u32) -> String {
    vocabs
        .get(&col)
        .and_then(|v| v.value(code))
        .unwrap_or("?")
        .to_string()
}

/// Per category value: its rows' losses on the batch and on the reference.
fn groups(
    schema: &Schema,
    vocabs: &Vocabularies,
    fresh: (&RowMatrix, &[f64], Option<&[f64]>),
    reference: (&RowMatrix, &[f64]),
) -> Vec<Group> {
    #[derive(Default)]
    struct Acc {
        n: usize,
        sum: f64,
        sq: f64,
    }
    let collect = |(rows, losses): (&RowMatrix, &[f64]), col: usize| {
        let mut by_code: BTreeMap<u32, Acc> = BTreeMap::new();
        for (r, &loss) in losses.iter().enumerate().take(rows.n_rows()) {
            if let Some(code) = rows.code(r, col) {
                let a = by_code.entry(code).or_default();
                a.n += 1;
                a.sum += loss;
                a.sq += loss * loss;
            }
        }
        by_code
    };
    let (fresh_rows, fresh_losses, errors) = fresh;
    let fresh = (fresh_rows, fresh_losses);
    let stats = |a: &Acc| {
        let m = a.sum / a.n as f64;
        let var = if a.n > 1 {
            ((a.sq - a.n as f64 * m * m) / (a.n - 1) as f64).max(0.0)
        } else {
            0.0
        };
        (m, var.sqrt())
    };
    let mut out = Vec::new();
    for col in schema.inputs() {
        if schema.columns[col].kind != ColumnKind::Category {
            continue;
        }
        let usual = collect(reference, col);
        let signed_sums = errors
            .filter(|e| e.iter().all(|x| x.is_finite()))
            .map(|e| collect((fresh_rows, e), col));
        for (code, acc) in collect(fresh, col) {
            let Some(r) = usual.get(&code) else {
                continue;
            };
            let (m, sd) = stats(&acc);
            let (rm, rsd) = stats(r);
            let signed = signed_sums
                .as_ref()
                .and_then(|s| s.get(&code))
                .filter(|_| rm > 0.0)
                .map(|e| {
                    let (mean, sd) = stats(e);
                    let rmse = rm.sqrt();
                    shift::Signed {
                        mean: mean / rmse,
                        sd: sd / rmse,
                    }
                });
            out.push(Group {
                column: schema.columns[col].name.clone(),
                value: value_name(vocabs, col, code),
                rows: acc.n,
                mean_loss: m,
                sd_loss: sd,
                reference_rows: r.n,
                reference_mean: rm,
                reference_sd: rsd,
                signed,
            });
        }
    }
    out
}

/// Category values whose fresh rows cost the serving model most beyond
/// what rows with the same value cost it on the stored holdout: for each
/// category input and value, Σ fresh loss − count × the value's reference
/// mean loss (the overall reference mean for a value with fewer than
/// `MIN_ROWS` reference rows). Values on fewer than `MIN_ROWS` fresh rows
/// or on more than half the batch (which would only restate the total) are
/// skipped. Descriptive: where to look, not a test.
pub fn hotspots(
    schema: &Schema,
    vocabs: &Vocabularies,
    fresh: (&RowMatrix, &[f64]),
    reference: (&RowMatrix, &[f64]),
) -> Vec<Hotspot> {
    const MIN_ROWS: usize = 5;
    const SHOWN: usize = 3;
    let n = fresh.0.n_rows();
    let overall = mean(reference.1);
    let groups = |(rows, losses): (&RowMatrix, &[f64]), col: usize| {
        let mut by_code: BTreeMap<u32, (usize, f64)> = BTreeMap::new();
        for (r, &loss) in losses.iter().enumerate().take(rows.n_rows()) {
            if let Some(code) = rows.code(r, col) {
                let e = by_code.entry(code).or_default();
                e.0 += 1;
                e.1 += loss;
            }
        }
        by_code
    };
    let mut found = Vec::new();
    for col in schema.inputs() {
        if schema.columns[col].kind != ColumnKind::Category {
            continue;
        }
        let usual = groups(reference, col);
        for (code, (count, total)) in groups(fresh, col) {
            if count < MIN_ROWS || 2 * count > n {
                continue;
            }
            let base = match usual.get(&code) {
                Some(&(c, t)) if c >= MIN_ROWS => t / c as f64,
                _ => overall,
            };
            let excess = total - base * count as f64;
            if excess.is_nan() || excess <= 0.0 {
                continue;
            }
            found.push(Hotspot {
                column: schema.columns[col].name.clone(),
                value: value_name(vocabs, col, code),
                rows: count,
                mean_loss: total / count as f64,
                usual_loss: base,
                excess_loss: excess,
            });
        }
    }
    // Ranked by excess / √rows: a large group's total excess grows with its
    // size even when each row is only a little off, a small group's mean
    // excess is noisy; this balances the two like a z-score would.
    let score = |h: &Hotspot| h.excess_loss / (h.rows as f64).sqrt();
    found.sort_by(|a, b| score(b).total_cmp(&score(a)));
    found.truncate(SHOWN);
    found
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::gate::near;

    #[test]
    fn value_levels_round_trip_and_stay_small() {
        let mut h = shift::ValueHistory::new();
        h.insert(("zone".into(), "north".into()), vec![0.5, -0.25, 1.0]);
        h.insert(("promo".into(), "tasting, free".into()), vec![]);
        assert_eq!(decode_value_levels(&encode_value_levels(&h, 1 << 20)), h);
        // A damaged tail loses only the entry it cuts.
        let bytes = encode_value_levels(&h, 1 << 20);
        let cut = decode_value_levels(&bytes[..bytes.len() - 3]);
        assert_eq!(cut.len(), 1);
        // Many values with long histories: older excesses go first, never
        // below the history a test needs.
        let mut big = shift::ValueHistory::new();
        for c in 0..40 {
            for v in 0..7 {
                big.insert((format!("col{c}"), format!("value{v}")), vec![0.1; 100]);
            }
        }
        let bytes = encode_value_levels(&big, VALUE_LEVELS_MAX_BYTES);
        assert!(bytes.len() <= VALUE_LEVELS_MAX_BYTES, "{}", bytes.len());
        let back = decode_value_levels(&bytes);
        assert_eq!(back.len(), 280);
        let kept = back.values().next().unwrap().len();
        assert!(
            (shift::LEVEL_MIN_HISTORY..LEVEL_HISTORY).contains(&kept),
            "{kept}"
        );
    }

    #[test]
    fn monitor_state_round_trips_and_stays_under_the_value_limit() {
        let mut state = MonitorState {
            serving: ModelId(7),
            previous: Some(ModelId(3)),
            prior: Prior::new(0.001),
            observations: (0..10)
                .map(|i| Observation {
                    x: i as f64 * 0.1,
                    w: 0.01,
                    log_numerator: -1.5,
                })
                .collect(),
        };
        assert_eq!(MonitorState::decode(&state.encode()), Some(state.clone()));
        state.previous = None;
        assert_eq!(MonitorState::decode(&state.encode()), Some(state.clone()));
        state.observations = vec![state.observations[0]; MONITOR_MAX_BATCHES + 100];
        let bytes = state.encode();
        assert!(bytes.len() < 64 * 1024, "{}", bytes.len());
        assert_eq!(
            MonitorState::decode(&bytes).unwrap().observations.len(),
            MONITOR_MAX_BATCHES
        );
        assert_eq!(MonitorState::decode(&bytes[..30]), None);
        // The layout before log ratios (θ, floor, τ² after the ids; no
        // version): its observations are differences of losses, so it
        // does not decode and the monitor starts afresh.
        let mut old = Vec::new();
        old.extend_from_slice(&ModelId(7).key());
        old.extend_from_slice(&ModelId(3).key());
        for v in [9.0f64, 0.9, 4.0, 12.0, 1.0, -2.0] {
            old.extend_from_slice(&v.to_le_bytes());
        }
        assert_eq!(old.len(), 40 + 24);
        assert_eq!(MonitorState::decode(&old), None);
    }

    #[test]
    fn levels_keep_the_most_recent_only() {
        let levels: Vec<f64> = (0..100).map(f64::from).collect();
        let kept = decode_levels(&encode_levels(&levels));
        assert_eq!(kept.len(), LEVEL_HISTORY);
        assert_eq!(kept.last(), Some(&99.0));
    }

    #[test]
    fn per_batch_differences_group_rows_by_batch() {
        let d = batch_differences(
            &[3.0, 5.0, 1.0, 1.0, 9.0],
            &[1.0, 1.0, 1.0, 0.0, 0.0],
            &[1, 1, 2, 2, 3],
        );
        // Batch 3 has one row: no within variance, left out.
        assert_eq!(d.len(), 2);
        // Batch 1: losses 4 against 1, s_i/S − p_i/P = ∓0.25.
        near(d[0].0, 4f64.ln(), 1e-12);
        near(d[0].1, 0.0625, 1e-12);
        // Batch 2: 1 against 0.5, s_i/S − p_i/P = ∓1.
        near(d[1].0, 2f64.ln(), 1e-12);
        near(d[1].1, 1.0, 1e-12);
        // No positive mean loss: no ratio.
        assert!(log_ratio_and_variance(&[0.0, 0.0], &[1.0, 2.0]).0.is_nan());
    }
}
