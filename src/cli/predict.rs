//! `tidegate predict`: score a CSV file with the serving model or a named
//! one. Reads only the config, `serving` and `models/`, so it works while
//! another process owns the state dir.

use std::path::PathBuf;

use anyhow::Context;

use super::{Cli, Exit, emit};
use crate::ids::ModelId;
use crate::ingest;
use crate::model::Predictions;
use crate::scoring::{LoadError, Scorer};
use crate::state::StateDir;

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    Csv,
    Jsonl,
}

#[derive(Debug, clap::Args)]
pub struct Args {
    /// CSV file to score (same columns as the training data; the target may be absent).
    #[arg(long, value_name = "FILE")]
    input: PathBuf,
    /// Model version to use (default: the serving model).
    #[arg(long, value_name = "ID")]
    model: Option<ModelId>,
    /// Where to write the scored rows (default: stdout).
    #[arg(long, value_name = "FILE")]
    output: Option<PathBuf>,
    /// Output format: the input columns plus predictions.
    #[arg(long, value_enum, default_value = "csv")]
    format: Format,
}

/// The serving model id, from `state/serving`.
pub(crate) fn serving_model(state: &StateDir) -> anyhow::Result<Option<ModelId>> {
    match std::fs::read_to_string(state.serving()) {
        Ok(text) => {
            let id = text
                .trim()
                .parse::<ModelId>()
                .map_err(|e| anyhow::anyhow!("{}: {e}", state.serving().display()))?;
            Ok(Some(id))
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
        Err(e) => {
            Err(anyhow::Error::new(e).context(format!("cannot read {}", state.serving().display())))
        }
    }
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    let id = match args.model {
        Some(id) => id,
        None => match serving_model(state)? {
            Some(id) => id,
            None => anyhow::bail!(
                "no model serves in {} yet; train one first, or name one with --model",
                state.root().display()
            ),
        },
    };
    let scorer = match Scorer::load(&state.models(), &config, id) {
        Ok(s) => s,
        Err(LoadError::Missing { id, dir }) => {
            anyhow::bail!("model {id} does not exist in {}", dir.display())
        }
        Err(LoadError::Model(e)) => return Err(e.into()),
    };
    let schema = &scorer.schema;
    let raw = ingest::read_file(&args.input, scorer.limits.max_file_bytes)?;
    let scored = match scorer.score(&raw.bytes)? {
        Ok(s) => s,
        Err(refusal) => {
            eprintln!(
                "error: {}: cannot score ({} problem{}):",
                args.input.display(),
                refusal.total,
                if refusal.total == 1 { "" } else { "s" }
            );
            for p in refusal.problems.iter().take(10) {
                eprintln!("  {p}");
            }
            return Ok(Exit::BadData);
        }
    };
    for (col, values) in &scored.unseen {
        tracing::warn!(
            "column {}: {} value(s) the model has not seen ({}); scored as none of the known values",
            schema.columns[*col].name,
            values.len(),
            values
                .iter()
                .take(5)
                .cloned()
                .collect::<Vec<_>>()
                .join(", ")
        );
    }
    let predictions = &scored.predictions;
    let target = scorer.target_name();
    let class_name = |c: u32| scorer.class_name(c);

    // The input is read again to copy its fields exactly; rows line up with
    // the parsed rows because both skip the same blank lines.
    let body = raw
        .bytes
        .strip_prefix(b"\xEF\xBB\xBF")
        .unwrap_or(&raw.bytes);
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(body);
    let mut records = reader.records();
    let header = records.next().context("input lost its header")??;
    let mut extra: Vec<String> = vec![format!("predicted_{target}")];
    if let Predictions::Classification { n_classes, .. } = predictions {
        extra.extend((0..*n_classes).map(|k| format!("p_{}", class_name(k as u32))));
    }
    let mut csv_out = csv::Writer::from_writer(Vec::new());
    let mut jsonl = String::new();
    if args.format == Format::Csv {
        csv_out.write_record(header.iter().chain(extra.iter().map(String::as_str)))?;
    }
    let mut i = 0usize;
    for rec in records {
        let rec = rec?;
        if rec.len() == 1 && rec.get(0).is_some_and(str::is_empty) {
            continue;
        }
        let added: Vec<String> = match predictions {
            Predictions::Regression { values } => vec![values[i].to_string()],
            Predictions::Classification {
                classes,
                probabilities,
                n_classes,
            } => {
                let mut f = vec![class_name(classes[i])];
                f.extend(
                    probabilities[i * n_classes..(i + 1) * n_classes]
                        .iter()
                        .map(|p| format!("{p:.6}")),
                );
                f
            }
        };
        match args.format {
            Format::Csv => {
                csv_out.write_record(rec.iter().chain(added.iter().map(String::as_str)))?
            }
            Format::Jsonl => {
                let mut obj = serde_json::Map::new();
                for (h, v) in header.iter().zip(rec.iter()) {
                    obj.insert(
                        h.trim().to_string(),
                        serde_json::Value::String(v.to_string()),
                    );
                }
                for (k, (h, v)) in extra.iter().zip(&added).enumerate() {
                    // The predicted class stays text; numbers become JSON numbers.
                    let number =
                        if k == 0 && matches!(predictions, Predictions::Classification { .. }) {
                            None
                        } else {
                            v.parse::<f64>().ok().and_then(serde_json::Number::from_f64)
                        };
                    obj.insert(
                        h.clone(),
                        number.map_or_else(
                            || serde_json::Value::String(v.clone()),
                            serde_json::Value::Number,
                        ),
                    );
                }
                jsonl.push_str(&serde_json::Value::Object(obj).to_string());
                jsonl.push('\n');
            }
        }
        i += 1;
    }
    let bytes = match args.format {
        Format::Csv => csv_out
            .into_inner()
            .map_err(|e| anyhow::anyhow!("cannot write CSV: {e}"))?,
        Format::Jsonl => jsonl.into_bytes(),
    };
    if i != predictions.len() {
        anyhow::bail!(
            "{}: read {i} rows back but scored {}; the file changed while it was read",
            args.input.display(),
            predictions.len()
        );
    }
    match &args.output {
        Some(path) => {
            crate::fsutil::write_atomic(path, &bytes)
                .with_context(|| format!("cannot write {}", path.display()))?;
            tracing::info!("scored {i} rows with model {id}; wrote {}", path.display());
        }
        None => emit(&String::from_utf8_lossy(&bytes))?,
    }
    if scored.has_target
        && let Ok(losses) = scorer
            .checkpoint
            .model
            .row_losses(&scored.rows, scorer.backend)
    {
        let mean = losses.iter().sum::<f64>() / losses.len().max(1) as f64;
        match config.data.task {
            crate::config::Task::Regression => {
                tracing::info!("on the rows' own targets: RMSE {:.4}", mean.sqrt())
            }
            crate::config::Task::Classification => {
                tracing::info!("on the rows' own targets: log loss {mean:.4}")
            }
        }
    }
    Ok(Exit::Ok)
}
