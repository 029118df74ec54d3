//! `tidegate models`: every model version with its parent, kind, training,
//! holdout loss and what became of it. Reads `models/*/manifest.json`,
//! `audit.jsonl` and `serving` only.

use std::collections::BTreeMap;

use serde::Serialize;

use super::{Cli, Exit, emit, table};
use crate::audit::Event;
use crate::ids::ModelId;
use crate::model::checkpoint::read_manifest;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {}

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
    /// What the log says became of it, latest last.
    decisions: Vec<String>,
    serving: bool,
}

pub fn run(cli: &Cli, state: &StateDir, _args: &Args) -> anyhow::Result<Exit> {
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
    for e in state.mirror().entries()? {
        if let Event::BaselinesScored {
            cycle,
            ridge_loss: Some(ridge),
            ..
        } = &e.event
        {
            for row in rows.values_mut().filter(|r| r.cycle == Some(*cycle)) {
                row.ridge_loss = Some(*ridge);
                row.beats_ridge = row.holdout_loss.map(|l| l < *ridge);
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
                r.decisions.join(", "),
            ]
        })
        .collect();
    let mut out = table(
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
            "decisions",
        ],
        &lines,
    );
    out.push_str("* serving\n");
    emit(&out)?;
    Ok(Exit::Ok)
}
