//! `tidegate verify`: check the audit chain, the store against the log and
//! the archive against the store; report the first problem and exit 1.

use super::{Cli, Exit, emit};
use crate::state::{self, StateDir};
use crate::verify;

#[derive(Debug, clap::Args)]
pub struct Args {}

pub fn run(cli: &Cli, state: &StateDir, _args: &Args) -> anyhow::Result<Exit> {
    // A running daemon holds the store open: it checks in its loop.
    let request = crate::daemon::Request::Verify;
    if let Some(exit) = crate::daemon::client::route(state, &request, cli.json)? {
        return Ok(exit);
    }
    let config = super::load_config(cli, state)?;
    let (owner, _) = state::open_untouched_log(state, &config)?;
    let result = verify::check(&owner)?;
    let (text, exit) = render(&result, cli.json);
    emit(&text)?;
    if let Some(e) = error(&result) {
        eprintln!("error: {e}");
    }
    Ok(exit)
}

/// The stderr line of a failed check (stdout carries the result either way).
pub(crate) fn error(result: &Result<verify::Report, verify::Problem>) -> Option<String> {
    result
        .as_ref()
        .err()
        .map(|p| format!("verify found a problem: {p}"))
}

/// The check's result as printed, with its exit code; the daemon answers
/// a routed `verify` with the same.
pub(crate) fn render(
    result: &Result<verify::Report, verify::Problem>,
    json: bool,
) -> (String, Exit) {
    let text = match (result, json) {
        (Ok(r), true) => format!("{}\n", serde_json::json!({"ok": true, "report": r})),
        (Err(p), true) => format!("{}\n", serde_json::json!({"ok": false, "problem": p})),
        (Ok(r), false) => format!(
            "ok: {} audit entries, {} batches, {} rows, {} checkpoints; chain, store, archive and checkpoints agree\n",
            r.audit_entries, r.batches, r.rows, r.checkpoints
        ),
        (Err(p), false) => format!("problem: {p}\n"),
    };
    let exit = if result.is_ok() {
        Exit::Ok
    } else {
        Exit::Failure
    };
    (text, exit)
}
