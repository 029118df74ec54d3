//! The fresh-data check, run on every accepted batch before anything trains
//! on it. The batch's rows are new to every model, so they are a fair test:
//!
//! - **regression**: the serving model against the model it replaced (when
//!   it came to serve by promotion or approval), paired row by row. A
//!   significant regression lets the replaced model serve again, logged as
//!   an automatic rollback with the evidence (never in approval mode, and
//!   not when `auto_rollback` is off: then it is only reported).
//! - **shift**: the serving model's losses on the batch against its losses
//!   on the stored holdout rows (Welch). A shift means the data moved; the
//!   daemon retrains early and `status` flags it. The stored holdout rows
//!   are sampled down to `MAX_REFERENCE_ROWS`, so the check costs the same
//!   on a store of millions of rows as on one of thousands.
//!
//! Every check is logged as `fresh-checked`, also when it could not test.

use chrono::Utc;

use std::collections::BTreeMap;

use crate::audit::{Entry, Event, FreshEvidence, Hotspot};
use crate::config::ColumnKind;
use crate::cycle::{CycleError, model_record};
use crate::gate::{self, FreshVerdict};
use crate::ids::{BatchId, ModelId};
use crate::lifecycle::{self, DecisionError};
use crate::model::ModelError;
use crate::model::checkpoint::{self, Checkpoint};
use crate::rng::Rng;
use crate::sample;
use crate::schema::{RowMatrix, Schema, Vocabularies};
use crate::state::Owner;
use crate::store::{Split, StoreError};

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

/// Runs the check on `batch` (just accepted). `None` when no model serves
/// or the serving model has already trained on the batch.
pub fn check_batch(
    owner: &mut Owner,
    batch: BatchId,
    user: &str,
) -> Result<Option<Outcome>, FreshError> {
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
    let fingerprint = owner.config.schema_fingerprint();
    let load = |id: ModelId| {
        Checkpoint::load(
            &checkpoint::model_dir(&owner.state.models(), id),
            &fingerprint,
        )
    };

    let mut rows = owner.store.rows(Split::Train, Some(batch), Some(batch))?;
    rows.extend(&owner.store.rows(Split::Holdout, Some(batch), Some(batch))?);
    let mut evidence = FreshEvidence {
        batch,
        rows: rows.n_rows(),
        serving,
        verdict: "untested".into(),
        mean_loss_serving: None,
        mean_loss_reference: None,
        p_shift: None,
        previous: None,
        mean_loss_previous: None,
        t: None,
        p_regression: None,
        hotspots: Vec::new(),
        reason: String::new(),
    };
    let mut regressed = false;
    if rows.n_rows() < gate_config.fresh_min_rows {
        evidence.reason = format!(
            "{} rows, fewer than fresh_min_rows = {}",
            rows.n_rows(),
            gate_config.fresh_min_rows
        );
    } else {
        let serving_model = load(serving)?.model;
        let fresh = serving_model.row_losses(&rows, backend)?;
        evidence.mean_loss_serving = Some(mean(&fresh));
        let step = std::time::Instant::now();
        let reference_rows = reference_rows(owner, record.trained_through)?;
        let read = step.elapsed().as_secs_f64();
        let reference = serving_model.row_losses(&reference_rows, backend)?;
        tracing::debug!(
            "batch {batch}: fresh-data check read {} reference rows in {read:.3} s, scored them in {:.3} s",
            reference_rows.n_rows(),
            step.elapsed().as_secs_f64() - read
        );
        let shift = gate::shift_check(&fresh, &reference, alpha);
        evidence.mean_loss_reference = shift.test.map(|t| t.mean_b);
        evidence.p_shift = shift.test.map(|t| t.p_greater);
        let mut reasons = vec![format!("shift: {}", shift.reason())];
        evidence.hotspots = hotspots(
            owner.store.schema(),
            owner.store.vocabularies(),
            (&rows, &fresh),
            (&reference_rows, &reference),
        );

        let previous = lifecycle::replaced_by_promotion(owner, serving)?;
        if let Some(p) = previous {
            // A predecessor whose checkpoint is gone or damaged cannot be
            // compared (nor rolled back to); say so rather than fail intake.
            match load(p) {
                Ok(ck) => {
                    let old = ck.model.row_losses(&rows, backend)?;
                    let check = gate::regression_check(&fresh, &old, alpha);
                    evidence.previous = Some(p);
                    evidence.mean_loss_previous = check.mean_loss_previous;
                    evidence.t = check.test.map(|t| t.t).filter(|t| t.is_finite());
                    evidence.p_regression = check.test.map(|t| t.p_greater);
                    regressed = check.verdict == FreshVerdict::Regressed;
                    reasons.push(format!("against {p}: {}", check.reason()));
                }
                Err(e) => reasons.push(format!("{p} not compared: {e}")),
            }
        } else {
            reasons.push(format!(
                "no predecessor to compare: {serving} did not replace a model by promotion or approval"
            ));
        }
        evidence.verdict = if regressed {
            "regressed"
        } else if shift.shifted == Some(true) {
            "shifted"
        } else if shift.shifted.is_some() {
            "steady"
        } else {
            "untested"
        }
        .into();
        evidence.reason = reasons.join("; ");
    }

    let entry = owner.store.record_with_meta(
        Event::FreshChecked {
            check: evidence.clone(),
        },
        user,
        Utc::now(),
        &[],
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

/// Most stored holdout rows the check scores as its reference: a uniform
/// sample of this many (all when fewer are stored) pins the reference mean
/// loss far more tightly than a batch's rows pin theirs, and keeps the
/// check's cost per batch flat as the store grows.
pub const MAX_REFERENCE_ROWS: usize = 50_000;

/// The holdout rows of batches up to `through`, or a uniform sample of
/// `MAX_REFERENCE_ROWS` of them, the same for the same seed and batches.
fn reference_rows(owner: &Owner, through: BatchId) -> Result<RowMatrix, StoreError> {
    let store = &owner.store;
    let n = store.row_count(Split::Holdout, None, Some(through))?;
    if n <= MAX_REFERENCE_ROWS {
        return store.rows(Split::Holdout, None, Some(through));
    }
    let seed = sample::seed_for(
        owner.config.training.seed,
        &[&b"fresh-reference/"[..], &through.key()].concat(),
    );
    let picks = sample::choose(n, MAX_REFERENCE_ROWS, &mut Rng::new(seed));
    store.rows_at(Split::Holdout, None, Some(through), &picks)
}

/// Category values whose fresh rows cost the serving model most beyond
/// what rows with the same value cost it on the stored holdout: for each
/// category input and value, Σ fresh loss − count × the value's reference
/// mean loss (the overall reference mean for a value with fewer than
/// `MIN_ROWS` reference rows, e.g. a new shop). Values on fewer than
/// `MIN_ROWS` fresh rows or on more than half the batch (which would only
/// restate the total) are skipped.
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
                value: vocabs
                    .get(&col)
                    .and_then(|v| v.value(code))
                    .unwrap_or("?")
                    .to_string(),
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
