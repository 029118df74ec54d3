//! `tidegate backup --out DIR` and `tidegate restore --from DIR`.

use std::path::PathBuf;

use super::{Cli, Exit, emit};
use crate::backup;
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct BackupArgs {
    /// Folder to write the backup to (must not exist or be empty).
    #[arg(long, value_name = "DIR")]
    out: PathBuf,
}

#[derive(Debug, clap::Args)]
pub struct RestoreArgs {
    /// A folder written by `tidegate backup`; restored as --state (which must
    /// not exist or be empty).
    #[arg(long, value_name = "DIR")]
    from: PathBuf,
}

pub fn run_backup(cli: &Cli, state: &StateDir, args: &BackupArgs) -> anyhow::Result<Exit> {
    // A running daemon holds the store: it writes the copy in its loop.
    let request = crate::daemon::Request::Backup {
        out: std::env::current_dir()?.join(&args.out),
    };
    if let Some(exit) = crate::daemon::client::route(state, &request, cli.json)? {
        return Ok(exit);
    }
    let config = super::load_config(cli, state)?;
    let (mut owner, _) = state::open(state, &config)?;
    let m = backup::backup(&mut owner, &args.out, &state::current_user())?;
    emit(&render_backup(&m, &args.out, cli.json)?)?;
    Ok(Exit::Ok)
}

/// A written backup as printed; the daemon answers a routed `backup` with the same.
pub(crate) fn render_backup(
    m: &backup::Manifest,
    out: &std::path::Path,
    json: bool,
) -> anyhow::Result<String> {
    Ok(if json {
        format!("{}\n", serde_json::to_string(&m)?)
    } else {
        format!(
            "backup written to {}: {} batches, {} rows, {} files and the store ({} entries), \
             audit log up to #{}\n",
            out.display(),
            m.batches,
            m.rows,
            m.files.len(),
            m.store_pairs,
            m.audit_seq
        )
    })
}

pub fn run_restore(cli: &Cli, state: &StateDir, args: &RestoreArgs) -> anyhow::Result<Exit> {
    let (m, report) = backup::restore(&args.from, state, &state::current_user())?;
    let text = if cli.json {
        format!(
            "{}\n",
            serde_json::json!({"restored_from": args.from, "backup": m, "verify": report})
        )
    } else {
        format!(
            "restored {} from {} (backup of {}): {} batches, {} rows, {} checkpoints; verify passed\n",
            state.root().display(),
            args.from.display(),
            m.created_at,
            report.batches,
            report.rows,
            report.checkpoints
        )
    };
    emit(&text)?;
    Ok(Exit::Ok)
}
