//! `tidegate ingest FILE…`: the daemon's intake path, run now on named files.
//! Each file is taken whole or refused whole; the files themselves are left
//! where they are (their bytes are archived in the state dir).

use std::path::{Path, PathBuf};

use super::{Cli, Exit, emit, shown};
use crate::fresh;
use crate::intake::{self, Outcome, Source};
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// CSV files to add, in order.
    #[arg(required = true, value_name = "FILE")]
    files: Vec<PathBuf>,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    // A running daemon owns the state dir: it takes the files in its loop.
    let request = crate::daemon::Request::Ingest {
        cwd: std::env::current_dir()?,
        files: args.files.clone(),
    };
    if let Some(exit) = crate::daemon::client::route(state, &request, cli.json)? {
        return Ok(exit);
    }
    let config = super::load_config(cli, state)?;
    let (mut owner, recovery) = state::open(state, &config)?;
    if recovery != state::Recovery::default() {
        tracing::info!("recovered after an interrupted run: {recovery:?}");
    }
    let user = state::current_user();
    let taken = take_files(&mut owner, None, &args.files, cli.json, &user)?;
    emit(&taken.stdout)?;
    if let Some(e) = &taken.error {
        eprintln!("error: {e}");
    }
    Ok(taken.exit)
}

/// What `ingest` prints: one result line (or JSON object) per file on
/// stdout, whatever its outcome, and on stderr why the exit code is not 0
/// (one `error:` line per refused or unready file).
pub(crate) struct Taken {
    pub stdout: String,
    /// Without the first `error: ` prefix (the printer adds it).
    pub error: Option<String>,
    pub exit: Exit,
}

/// Takes each file through intake and renders the outcomes (text or JSON
/// lines) with the exit code they call for; the daemon answers with the same.
/// Relative names are read from `base` (the caller's folder) when given.
pub(crate) fn take_files(
    owner: &mut state::Owner,
    base: Option<&Path>,
    files: &[PathBuf],
    json_out: bool,
    user: &str,
) -> anyhow::Result<Taken> {
    let state = &owner.state.clone();
    let mut exit = Exit::Ok;
    let mut out = String::new();
    let mut errors: Vec<String> = Vec::new();
    for file in files {
        let path = base.map_or_else(|| file.clone(), |b| b.join(file));
        let outcome = intake::take_file(owner, &path, Source::Keep, user, chrono::Utc::now())?;
        let shown_file = file.display().to_string();
        let (status, mut detail, mut json) = match &outcome {
            Outcome::Accepted { batch, entry } => (
                "accepted",
                format!(
                    "batch {} with {} rows ({} train, {} holdout)",
                    batch.id,
                    batch.rows(),
                    batch.train_rows,
                    batch.holdout_rows
                ),
                serde_json::json!({"file": shown_file, "status": "accepted", "batch": batch.id, "rows": batch.rows(), "train_rows": batch.train_rows, "holdout_rows": batch.holdout_rows, "audit_seq": entry.seq}),
            ),
            Outcome::Duplicate { of, entry } => (
                "duplicate",
                format!("duplicate of batch {of}; nothing stored"),
                serde_json::json!({"file": shown_file, "status": "duplicate", "duplicate_of": of, "audit_seq": entry.seq}),
            ),
            Outcome::Completed { batch } => (
                "accepted",
                format!(
                    "already stored as batch {batch} by an interrupted run; archiving finished"
                ),
                serde_json::json!({"file": shown_file, "status": "accepted", "batch": batch, "recovered": true}),
            ),
            Outcome::Refused {
                refusal,
                kept_as,
                entry,
            } => {
                exit = Exit::BadData;
                let why = kept_as
                    .as_ref()
                    .map(|p| format!("{}.why.json", shown(state, p)));
                let mut d = format!(
                    "nothing stored ({} problem{}): {}",
                    refusal.total,
                    if refusal.total == 1 { "" } else { "s" },
                    refusal.first()
                );
                if let Some(w) = &why {
                    d.push_str(&format!("; all problems in {w}"));
                }
                errors.push(format!("{shown_file}: refused, {d}"));
                (
                    "refused",
                    d,
                    serde_json::json!({"file": shown_file, "status": "refused", "problems_total": refusal.total, "problems": refusal.problems, "why": why, "audit_seq": entry.seq}),
                )
            }
            Outcome::NotReady { reason } => {
                exit = Exit::Failure;
                errors.push(format!("{shown_file}: not taken: {reason}"));
                (
                    "not-ready",
                    reason.clone(),
                    serde_json::json!({"file": shown_file, "status": "not-ready", "reason": reason}),
                )
            }
        };
        if let Outcome::Accepted { batch, .. } = &outcome
            && let Some(aside) = &batch.set_aside
        {
            detail.push_str(&format!(
                "; suspect, set aside (not trained on, not in the holdout): {}",
                aside.reason
            ));
            json["set_aside"] =
                serde_json::json!({"reason": aside.reason, "automatic": aside.automatic});
        }
        if let Outcome::Accepted { batch, .. } = &outcome {
            // The batch is stored whatever the check says; a model that
            // cannot be scored is reported, a failure to write ends the
            // command (the next start runs the check again).
            match fresh::check_batch(owner, batch.id, user) {
                Ok(Some(found)) => {
                    let e = &found.evidence;
                    detail.push_str(&format!("; fresh-data check: {}", e.verdict));
                    if let Some(r) = &found.rollback {
                        detail.push_str(&format!("; {}", r.event.summary()));
                    }
                    json["fresh_check"] = serde_json::to_value(e).expect("evidence serialises");
                    json["rolled_back"] = serde_json::Value::Bool(found.rollback.is_some());
                }
                Ok(None) => {}
                Err(err) if err.is_fatal() => {
                    return Err(anyhow::Error::new(err).context(format!(
                        "{shown_file}: stored as batch {}, but its fresh-data check could not be recorded",
                        batch.id
                    )));
                }
                Err(err) => {
                    tracing::warn!("{shown_file}: the fresh-data check could not run: {err}");
                    detail.push_str(&format!("; fresh-data check failed: {err}"));
                }
            }
        }
        if json_out {
            out.push_str(&format!("{json}\n"));
        } else {
            out.push_str(&format!("{shown_file}: {status}: {detail}\n"));
        }
    }
    Ok(Taken {
        stdout: out,
        error: (!errors.is_empty()).then(|| errors.join("\nerror: ")),
        exit,
    })
}
