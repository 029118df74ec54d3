//! `tidegate models`: every model version with its parent, kind, training,
//! holdout loss, the batches it saw (directly or through its parents) and
//! what became of it; `--trained-on BATCH` lists the models that saw one
//! batch. Reads `models/*/manifest.json`, `audit.jsonl` and `serving` only.

use std::collections::BTreeMap;

use serde::Serialize;

use super::{Cli, Exit, emit};
use crate::audit::Event;
use crate::ids::{BatchId, ModelId};
use crate::model::checkpoint::read_manifest;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Only the models that saw this batch (e.g. b000006), directly or
    /// through the weights they started from.
    #[arg(long, value_name = "BATCH")]
    pub trained_on: Option<BatchId>,
}

#[derive(Debug, Default, Serialize)]
struct Row {
    id: Option<ModelId>,
    parent: Option<ModelId>,
    created_at: String,
    kind: String,
    cycle: Option<u64>,
    rows: usize,
    epochs: usize,
    seconds: f64,
    holdout_loss: Option<f64>,
    /// The ridge baseline's holdout loss in the same cycle, on the same rows.
    ridge_loss: Option<f64>,
    beats_ridge: Option<bool>,
    /// The boosted trees' holdout loss in the same cycle, on the same rows
    /// (absent before the trees existed or when they were not fitted).
    #[serde(skip_serializing_if = "Option::is_none")]
    trees_loss: Option<f64>,
    /// One-sided p that the trees do better than this model.
    #[serde(skip_serializing_if = "Option::is_none")]
    trees_p: Option<f64>,
    /// How much lower the trees' loss is, as a share of this model's, when
    /// that is worth telling (`trees::advice`).
    #[serde(skip_serializing_if = "Option::is_none")]
    trees_better_by: Option<f64>,
    /// What the log says became of it, latest last.
    decisions: Vec<String>,
    serving: bool,
    /// Batches its training could read, and with its parents' (see
    /// `provenance`); absent for a model the log has no training entry of.
    #[serde(skip_serializing_if = "Option::is_none")]
    batches_direct: Option<Vec<BatchId>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    batches_seen: Option<Vec<BatchId>>,
    /// With `--trained-on`: "directly" or "through_parent".
    #[serde(skip_serializing_if = "Option::is_none")]
    route: Option<crate::provenance::Route>,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    if !state.is_initialised() {
        return Err(crate::store::StoreError::NotInitialised {
            path: state.root().to_path_buf(),
        }
        .into());
    }
    let serving = super::predict::serving_model(state)?;
    let mut rows: BTreeMap<ModelId, Row> = BTreeMap::new();
    if let Ok(dir) = std::fs::read_dir(state.models()) {
        for entry in dir.flatten() {
            let name = entry.file_name().to_string_lossy().into_owned();
            let Ok(id) = name.parse::<ModelId>() else {
                continue;
            };
            let Ok(m) = read_manifest(&entry.path()) else {
                continue;
            };
            rows.insert(
                id,
                Row {
                    id: Some(id),
                    parent: m.parent,
                    created_at: m.created_at.clone(),
                    kind: crate::cycle::run_name(m.kind).to_string(),
                    rows: m.summary.rows + m.summary.replay_rows,
                    epochs: m.summary.epochs,
                    seconds: m.summary.seconds,
                    serving: serving == Some(id),
                    ..Row::default()
                },
            );
        }
    }
    let entries = state.mirror().entries()?;
    let lineages = crate::provenance::lineages(&entries);
    for (id, l) in &lineages {
        if let Some(row) = rows.get_mut(id) {
            row.batches_direct = Some(l.direct.iter().copied().collect());
            row.batches_seen = Some(l.saw.iter().copied().collect());
        }
    }
    if let Some(batch) = args.trained_on {
        let saw: BTreeMap<ModelId, crate::provenance::Route> =
            crate::provenance::trained_on(&lineages, batch)
                .into_iter()
                .collect();
        rows.retain(|id, _| saw.contains_key(id));
        for (id, row) in rows.iter_mut() {
            row.route = saw.get(id).copied();
        }
    }
    for e in &entries {
        if let Event::BaselinesScored {
            cycle,
            ridge_loss,
            trees_loss,
            trees_versus,
            ..
        } = &e.event
        {
            for row in rows.values_mut().filter(|r| r.cycle == Some(*cycle)) {
                if let Some(ridge) = ridge_loss {
                    row.ridge_loss = Some(*ridge);
                    row.beats_ridge = row.holdout_loss.map(|l| l < *ridge);
                }
                if let Some(trees) = trees_loss {
                    row.trees_loss = Some(*trees);
                    row.trees_p = trees_versus
                        .iter()
                        .find(|v| Some(v.model) == row.id)
                        .and_then(|v| v.p);
                    row.trees_better_by = row
                        .holdout_loss
                        .and_then(|l| crate::trees::advice(l, *trees, row.trees_p));
                }
            }
            continue;
        }
        let Some(model) = e.event.model() else {
            continue;
        };
        let Some(row) = rows.get_mut(&model) else {
            continue;
        };
        match &e.event {
            Event::CandidateTrained {
                cycle,
                holdout_loss,
                ..
            } => {
                row.cycle = Some(*cycle);
                row.holdout_loss = Some(*holdout_loss);
            }
            // Checks of the serving model on each batch are not decisions.
            Event::FreshChecked { .. } => {}
            other => row.decisions.push(other.kind().to_string()),
        }
    }
    if cli.json {
        let mut out = String::new();
        for r in rows.values() {
            out.push_str(&serde_json::to_string(r)?);
            out.push('\n');
        }
        emit(&out)?;
        return Ok(Exit::Ok);
    }
    let lines: Vec<Vec<String>> = rows
        .values()
        .map(|r| {
            vec![
                format!(
                    "{}{}",
                    r.id.map(|m| m.to_string()).unwrap_or_default(),
                    if r.serving { " *" } else { "" }
                ),
                r.parent.map_or_else(|| "-".into(), |p| p.to_string()),
                r.created_at.clone(),
                r.kind.clone(),
                r.cycle.map_or_else(|| "-".into(), |c| c.to_string()),
                r.rows.to_string(),
                r.epochs.to_string(),
                r.holdout_loss
                    .map_or_else(|| "-".into(), |l| format!("{l:.4}")),
                match (r.ridge_loss, r.beats_ridge) {
                    (Some(l), Some(true)) => format!("{l:.4} (beaten)"),
                    (Some(l), _) => format!("{l:.4} (NOT beaten)"),
                    (None, _) => "-".into(),
                },
                match (r.trees_loss, r.trees_better_by) {
                    (Some(l), Some(share)) => format!("{l:.4} ({:.0}% better)", 100.0 * share),
                    (Some(l), None) => format!("{l:.4}"),
                    (None, _) => "-".into(),
                },
                r.batches_seen.as_ref().map_or_else(
                    || "-".into(),
                    |b| crate::provenance::ranges_text(&b.iter().copied().collect()),
                ),
                r.decisions.join(", "),
            ]
        })
        .collect();
    let mut out = super::table_styled(
        &[
            "model",
            "parent",
            "created (UTC)",
            "kind",
            "cycle",
            "rows",
            "epochs",
            "holdout loss",
            "ridge loss",
            "trees loss",
            "batches seen",
            "decisions",
        ],
        &lines,
        cli.colored(),
    );
    out.push_str("* serving\n");
    if rows.values().any(|r| r.trees_better_by.is_some()) {
        out.push_str(&format!(
            "\"better\": boosted trees on the same holdout rows did at least {:.0}% better, \
                 one-sided p ≤ {} with batches as clusters; the network may be the wrong tool for \
                 this data (advice only: the network serves)\n",
            100.0 * crate::trees::ADVICE_MARGIN,
            crate::trees::ADVICE_ALPHA
        ));
    }
    if let Some(batch) = args.trained_on {
        let mut by: Vec<String> = rows
            .values()
            .filter_map(|r| Some((r.id?, r.route?)))
            .map(|(id, route)| format!("{id} {}", route.words()))
            .collect();
        if by.is_empty() {
            by.push("no model".into());
        }
        out.push_str(&format!("{batch} was seen by: {}\n", by.join(", ")));
    }
    emit(&out)?;
    Ok(Exit::Ok)
}
