//! `tidegate columns`: what the stored rows hold, column by column and per
//! side of the holdout split: counts, missing values, sum, mean, min and
//! max of number columns, the values of category columns. Reads
//! `audit.jsonl` (which row file is each batch's, which batches are set
//! aside) and the row files only, so it works while the daemon runs, and
//! its figures are what any other Parquet reader finds in the same files.

use std::collections::BTreeMap;

use serde::Serialize;

use super::{Cli, Exit, emit};
use crate::audit::Event;
use crate::ids::BatchId;
use crate::rowfile::{self, Values};
use crate::state::StateDir;
use crate::store::Split;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Count the batches set aside too (by default they are left out, as
    /// training and the holdout leave them out).
    #[arg(long)]
    pub with_set_aside: bool,
    /// Category values listed per column in the text output (the JSON
    /// output lists them all).
    #[arg(long, default_value_t = 10, value_name = "N")]
    pub values: usize,
}

#[derive(Debug, Default, Serialize)]
struct Report {
    batches: u64,
    files: Vec<String>,
    train: Side,
    holdout: Side,
}

#[derive(Debug, Default, Serialize)]
struct Side {
    rows: u64,
    columns: BTreeMap<String, Column>,
}

#[derive(Debug, Default, Serialize)]
struct Column {
    present: u64,
    missing: u64,
    /// Number columns: sum, mean, min and max of the present values, summed
    /// in f64.
    #[serde(skip_serializing_if = "Option::is_none")]
    sum: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    mean: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    min: Option<f32>,
    #[serde(skip_serializing_if = "Option::is_none")]
    max: Option<f32>,
    /// Category columns: each value and its rows.
    #[serde(skip_serializing_if = "Option::is_none")]
    values: Option<BTreeMap<String, u64>>,
    /// Column order in the files (for the text output).
    #[serde(skip)]
    order: usize,
}

/// Every batch the log says was accepted, in order.
fn accepted_batches(entries: &[crate::audit::Entry]) -> Vec<BatchId> {
    entries
        .iter()
        .filter_map(|e| match &e.event {
            Event::BatchAccepted { batch, .. } => Some(*batch),
            _ => None,
        })
        .collect()
}

fn add(side: &mut Side, columns: &[(String, Values)]) {
    let n = columns.first().map_or(0, |(_, v)| match v {
        Values::Numbers(x) => x.len(),
        Values::Texts(x) => x.len(),
    });
    side.rows += n as u64;
    let next = side.columns.len();
    for (i, (name, values)) in columns.iter().enumerate() {
        let col = side.columns.entry(name.clone()).or_insert_with(|| Column {
            order: next + i,
            ..Column::default()
        });
        match values {
            Values::Numbers(v) => {
                for x in v {
                    match x {
                        Some(x) => {
                            col.present += 1;
                            *col.sum.get_or_insert(0.0) += f64::from(*x);
                            col.min = Some(col.min.map_or(*x, |m| m.min(*x)));
                            col.max = Some(col.max.map_or(*x, |m| m.max(*x)));
                        }
                        None => col.missing += 1,
                    }
                }
            }
            Values::Texts(v) => {
                let counts = col.values.get_or_insert_with(BTreeMap::new);
                for x in v {
                    match x {
                        Some(x) => {
                            col.present += 1;
                            *counts.entry(x.clone()).or_default() += 1;
                        }
                        None => col.missing += 1,
                    }
                }
            }
        }
    }
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    if !state.is_initialised() {
        return Err(crate::store::StoreError::NotInitialised {
            path: state.root().to_path_buf(),
        }
        .into());
    }
    let entries = state.mirror().entries()?;
    let files = crate::audit::row_files(&entries);
    let aside = super::status::Summary::from_entries(&entries).set_aside;
    let mut report = Report::default();
    let mut unmoved = Vec::new();
    for batch in accepted_batches(&entries) {
        if aside.contains_key(&batch) && !args.with_set_aside {
            continue;
        }
        let Some((_, file)) = files.get(&batch).cloned() else {
            unmoved.push(batch);
            continue;
        };
        let path = state.rows().join(&file.name);
        rowfile::for_each_group(&path, |split, columns| match split {
            Split::Train => add(&mut report.train, columns),
            Split::Holdout => add(&mut report.holdout, columns),
        })?;
        report.batches += 1;
        report.files.push(file.name);
    }
    if !unmoved.is_empty() {
        anyhow::bail!(
            "the rows of {} batch(es) ({}…) are still in the store of a version from before row files; the next start of the daemon or of a command that takes the state dir (ingest, retrain) moves them",
            unmoved.len(),
            unmoved[0]
        );
    }
    for side in [&mut report.train, &mut report.holdout] {
        for col in side.columns.values_mut() {
            if let Some(sum) = col.sum {
                col.mean = Some(sum / col.present as f64);
            }
        }
    }
    if cli.json {
        emit(&format!("{}\n", serde_json::to_string(&report)?))?;
        return Ok(Exit::Ok);
    }
    let mut text = format!(
        "{} batches{}, {} row files in {}\n",
        report.batches,
        if args.with_set_aside {
            " (set-aside ones included)"
        } else {
            " in use"
        },
        report.files.len(),
        state.rows().display()
    );
    for (name, side) in [("train", &report.train), ("holdout", &report.holdout)] {
        text.push_str(&format!("\n{name}: {} rows\n", side.rows));
        let mut cols: Vec<(&String, &Column)> = side.columns.iter().collect();
        cols.sort_by_key(|(_, c)| c.order);
        for (col_name, c) in cols {
            match &c.values {
                None => text.push_str(&format!(
                    "  {col_name:<16} {:>9} present {:>7} missing  sum {}  mean {}  min {}  max {}\n",
                    c.present,
                    c.missing,
                    c.sum.map_or("-".into(), |v| format!("{v:.6}")),
                    c.mean.map_or("-".into(), |v| format!("{v:.4}")),
                    c.min.map_or("-".into(), |v| v.to_string()),
                    c.max.map_or("-".into(), |v| v.to_string()),
                )),
                Some(values) => {
                    let mut by_rows: Vec<(&String, &u64)> = values.iter().collect();
                    by_rows.sort_by(|a, b| b.1.cmp(a.1).then(a.0.cmp(b.0)));
                    let shown: Vec<String> = by_rows
                        .iter()
                        .take(args.values)
                        .map(|(v, n)| format!("{v:?} {n}"))
                        .collect();
                    let more = values.len().saturating_sub(args.values);
                    text.push_str(&format!(
                        "  {col_name:<16} {:>9} present {:>7} missing  {} values: {}{}\n",
                        c.present,
                        c.missing,
                        values.len(),
                        shown.join(", "),
                        if more > 0 {
                            format!(", and {more} more")
                        } else {
                            String::new()
                        }
                    ));
                }
            }
        }
    }
    emit(&text)?;
    Ok(Exit::Ok)
}
