//! The suspect-batch check, run by intake on every parsed batch before it is
//! committed, so a suspect batch is born set aside in its own transaction:
//! stored (nothing accepted is lost) and archived, but never trained on,
//! never in the holdout, the drift reference, the baselines or the cycle
//! trigger, and never shown to the fresh-data check (so it cannot cause a
//! rollback). The judgements are [`crate::gate::suspect`]'s; this module
//! gathers what they need: the references (the serving model, the model
//! it replaced, and the ridge baseline of `baseline` refitted on the
//! stored training rows, which gives a reference from the second batch
//! on), their losses on the batch with its own and with shuffled targets,
//! and the same figures for earlier batches' holdout rows.

use std::collections::BTreeMap;

use crate::audit::{SuspectEvidence, SuspectReference};
use crate::baseline::Ridge;
use crate::config::{ColumnKind, Task};
use crate::gate::suspect::{self, PairingInput};
use crate::ids::{BatchId, ModelId};
use crate::ingest::Batch;
use crate::rng::Rng;
use crate::schema::{FeatureSpec, RowMatrix};
use crate::state::Owner;
use crate::store::{Split, StoreError};

/// Earlier batches the check compares with.
pub const HISTORY_BATCHES: usize = 60;
/// Holdout rows of one earlier batch scored (evenly thinned above this).
pub const HISTORY_ROWS_PER_BATCH: usize = 200;
/// Rows of the batch scored (evenly thinned above this).
pub const MAX_BATCH_ROWS: usize = 5_000;
/// Stored training rows the ridge reference is refitted on (a sample).
pub const MAX_FIT_ROWS: usize = 50_000;
/// Shuffles of the targets whose losses are averaged per row.
pub const SHUFFLES: usize = 4;

/// A reference model: its name and a way to score rows.
type Scorer<'a> = Box<dyn Fn(&RowMatrix) -> Result<Vec<f64>, String> + 'a>;

/// Runs the check on a parsed batch. `None` when nothing is stored yet
/// (the first batch has nothing to be compared with). Store failures are
/// errors; a reference that cannot be loaded or scored is left out and
/// named in the reason.
pub fn check(owner: &Owner, batch: &Batch) -> Result<Option<SuspectEvidence>, StoreError> {
    let store = &owner.store;
    let counts = store.split_counts(Split::Holdout, None, None)?;
    if counts.is_empty() {
        return Ok(None);
    }
    let schema = store.schema().clone();
    let target = schema.target;
    let mut notes: Vec<String> = Vec::new();

    // The batch's rows, less those with no target or a category value the
    // store has never seen (no reference can speak for them).
    let mut all = batch.train.clone();
    all.extend(&batch.holdout);
    let copies_share = suspect::modal_share(&row_keys(&schema, &all));
    let vocab_len: BTreeMap<usize, usize> = store
        .vocabularies()
        .iter()
        .map(|(c, v)| (*c, v.len()))
        .collect();
    let usable: Vec<usize> = (0..all.n_rows())
        .filter(|&r| {
            let has_target = match schema.task {
                Task::Regression => all.number(r, target).is_some(),
                Task::Classification => all
                    .code(r, target)
                    .is_some_and(|c| (c as usize) < vocab_len.get(&target).copied().unwrap_or(0)),
            };
            has_target
                && schema.inputs().all(|c| {
                    schema.columns[c].kind != ColumnKind::Category
                        || all.code(r, c).is_none_or(|code| {
                            (code as usize) < vocab_len.get(&c).copied().unwrap_or(0)
                        })
                })
        })
        .collect();
    let rows = crate::drift::thin(&all.select(&usable), MAX_BATCH_ROWS);
    if rows.n_rows() < all.n_rows() {
        notes.push(format!(
            "pairing judged on {} of {} rows",
            rows.n_rows(),
            all.n_rows()
        ));
    }

    // Earlier batches' holdout rows, thinned per batch, with their batch.
    let recent: Vec<(BatchId, usize)> = counts
        .iter()
        .rev()
        .take(HISTORY_BATCHES)
        .rev()
        .copied()
        .collect();
    let from = recent.first().map(|(b, _)| *b);
    let stored = store.rows(Split::Holdout, from, None)?;
    let mut past = RowMatrix::new(schema.width());
    let mut past_batch = Vec::new();
    let mut past_copies = Vec::new();
    let mut at = 0;
    for &(b, n) in &recent {
        let picked: Vec<usize> = (at..at + n).collect();
        at += n;
        let mine = stored.select(&picked);
        past_copies.push(suspect::modal_share(&row_keys(&schema, &mine)));
        let mine = crate::drift::thin(&mine, HISTORY_ROWS_PER_BATCH);
        past_batch.extend(std::iter::repeat_n(b.0, mine.n_rows()));
        past.extend(&mine);
    }

    // Target size, against the stored rows and earlier batches.
    let train_stats = store.train_stats()?;
    let scale = match (schema.task, train_stats.numbers.get(&target)) {
        (Task::Regression, Some(st)) if st.count > 0 => {
            let stored_rms = suspect::root_mean_square(st.mean, st.population_variance());
            let batch_stats = crate::schema::ColumnStats::of_rows(&schema, &all);
            let past_ratios: Vec<f64> = store
                .batches()?
                .iter()
                .filter(|r| !r.is_set_aside())
                .rev()
                .take(HISTORY_BATCHES)
                .filter_map(|r| r.train_stats.numbers.get(&target))
                .filter(|s| s.count > 0)
                .map(|s| suspect::root_mean_square(s.mean, s.population_variance()) / stored_rms)
                .collect();
            batch_stats
                .numbers
                .get(&target)
                .filter(|s| s.count > 0)
                .and_then(|s| {
                    suspect::judge_scale(
                        suspect::root_mean_square(s.mean, s.population_variance()) / stored_rms,
                        &past_ratios,
                    )
                })
        }
        _ => None,
    };
    let copies = suspect::judge_copies(copies_share, all.n_rows(), &past_copies);

    // The references.
    let mut scorers: Vec<(String, Scorer<'_>)> = Vec::new();
    let backend = owner.config.training.predict_backend;
    let load = |id: ModelId| owner.checkpoint(id);
    let scorer = |model: crate::model::Model| -> Scorer<'_> {
        Box::new(move |r: &RowMatrix| model.row_losses(r, backend).map_err(|e| e.to_string()))
    };
    if let Some(serving) = store.serving()? {
        match load(serving) {
            Ok(ck) => scorers.push((format!("serving {serving}"), scorer(ck.model))),
            Err(e) => notes.push(format!("serving {serving} not used: {e}")),
        }
        let stored = crate::fresh::stored_monitor(store, serving)?;
        match crate::fresh::compared_with(owner, serving, stored.as_ref()) {
            Ok(Some(p)) => match load(p) {
                Ok(ck) => scorers.push((format!("predecessor {p}"), scorer(ck.model))),
                Err(e) => notes.push(format!("predecessor {p} not used: {e}")),
            },
            Ok(None) => {}
            Err(e) => notes.push(format!("predecessor not looked up: {e}")),
        }
    }
    let spec = FeatureSpec::new(&schema, &train_stats, store.vocabularies());
    let fit_rows = store.sample_rows(Split::Train, MAX_FIT_ROWS)?;
    match Ridge::fit(&spec, &[&fit_rows], owner.config.gate.ridge_lambda) {
        Ok(ridge) => scorers.push((
            "ridge".to_string(),
            Box::new(move |r: &RowMatrix| ridge.row_losses(r).map_err(|e| e.to_string())),
        )),
        Err(e) => notes.push(format!("ridge not fitted: {e}")),
    }

    let seed = crate::sample::seed_for(
        owner.config.training.seed,
        &[&b"suspect/"[..], &store.next_batch_id().key()].concat(),
    );
    let batch_labels = vec![0u64; rows.n_rows()];
    let mut pairings = Vec::new();
    for (name, score) in &scorers {
        let scored = (|| -> Result<PairingInput, String> {
            let (actual, shuffled) = scored_pairs(score, &rows, &batch_labels, target, seed)?;
            let (past_actual, past_shuffled) =
                scored_pairs(score, &past, &past_batch, target, seed ^ 1)?;
            let holdout_loss = (!past_actual.is_empty())
                .then(|| past_actual.iter().sum::<f64>() / past_actual.len() as f64);
            let mut by_batch: BTreeMap<u64, (Vec<f64>, Vec<f64>)> = BTreeMap::new();
            for ((a, s), b) in past_actual.iter().zip(&past_shuffled).zip(&past_batch) {
                let e = by_batch.entry(*b).or_default();
                e.0.push(*a);
                e.1.push(*s);
            }
            let history = by_batch
                .values()
                .filter(|(a, _)| a.len() >= suspect::MIN_ROWS)
                .filter_map(|(a, s)| suspect::explained(a, s))
                .collect();
            Ok(PairingInput {
                name: name.clone(),
                actual,
                shuffled,
                holdout_loss,
                history,
            })
        })();
        match scored {
            Ok(input) => pairings.push(suspect::judge_pairing(
                &input,
                owner.config.gate.suspect_alpha,
            )),
            Err(e) => notes.push(format!("{name} not scored: {e}")),
        }
    }
    let verdict = suspect::judge(&pairings, scale.as_ref(), &copies);
    let mut reason: Vec<String> = pairings.iter().map(|p| p.reason.clone()).collect();
    if let Some(s) = &scale {
        reason.push(format!(
            "target size {}× the stored rows' (earlier batches within {}×)",
            crate::gate::show(s.ratio),
            crate::gate::show(s.usual.exp())
        ));
    }
    reason.push(format!(
        "most common row {} of the rows (earlier batches at most {})",
        crate::gate::show(copies.share),
        crate::gate::show(copies.usual)
    ));
    reason.extend(notes);
    Ok(Some(SuspectEvidence {
        suspect: verdict.suspect,
        why: verdict.why,
        rows: rows.n_rows(),
        references: pairings
            .iter()
            .map(|p| SuspectReference {
                name: p.name.clone(),
                verdict: p.verdict.name().to_string(),
                explained: p.explained,
                usual_explained: p.usual,
                level: p.level,
                p: p.p,
                history: p.history,
            })
            .collect(),
        target_scale: scale.map(|s| s.ratio),
        copies_share,
        reason: reason.join("; "),
    }))
}

/// Per-row losses with the rows' own targets, and averaged over
/// [`SHUFFLES`] shuffles of the targets among the rows of the same label
/// (batch).
fn scored_pairs(
    score: &Scorer<'_>,
    rows: &RowMatrix,
    labels: &[u64],
    target: usize,
    seed: u64,
) -> Result<(Vec<f64>, Vec<f64>), String> {
    if rows.n_rows() == 0 {
        return Ok((Vec::new(), Vec::new()));
    }
    let actual = score(rows)?;
    let mut groups: BTreeMap<u64, Vec<usize>> = BTreeMap::new();
    for (r, b) in labels.iter().enumerate() {
        groups.entry(*b).or_default().push(r);
    }
    let mut rng = Rng::new(seed);
    let mut shuffled = vec![0.0; rows.n_rows()];
    for _ in 0..SHUFFLES {
        let mut cells = rows.cells().to_vec();
        let w = rows.width();
        for members in groups.values() {
            let mut from = members.clone();
            rng.shuffle(&mut from);
            for (&to_row, &from_row) in members.iter().zip(&from) {
                cells[to_row * w + target] = rows.row(from_row)[target];
            }
        }
        let losses = score(&RowMatrix::from_cells(w, cells))?;
        for (s, l) in shuffled.iter_mut().zip(losses) {
            *s += l / SHUFFLES as f64;
        }
    }
    Ok((actual, shuffled))
}

/// One key per row for finding copies: category codes as they are,
/// numbers with their last 12 mantissa bits cleared (about 3 significant
/// digits), so rows that differ only in float noise count as one.
fn row_keys(schema: &crate::schema::Schema, rows: &RowMatrix) -> Vec<Vec<u32>> {
    let mask: Vec<u32> = schema
        .columns
        .iter()
        .map(|c| match c.kind {
            ColumnKind::Number => 0xFFFF_F000,
            ColumnKind::Category => u32::MAX,
        })
        .collect();
    (0..rows.n_rows())
        .map(|r| rows.row(r).iter().zip(&mask).map(|(c, m)| c & m).collect())
        .collect()
}
