//! Command-line interface: argument types (clap), one file per command, and
//! the mapping of failures to exit codes. Commands print data on stdout and
//! messages on stderr; `--json` switches data to JSON.

mod approve;
mod decline;
mod ingest;
mod init;
mod log;
mod models;
mod predict;
mod report;
mod retrain;
mod rollback;
mod status;
mod verify;

use std::io::Write;
use std::path::{Path, PathBuf};

use clap::{Parser, Subcommand};

use crate::config::{Config, ConfigError};
use crate::state::{StateDir, StateError};
use crate::store::StoreError;

/// Exit codes (see the README).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Exit {
    Ok = 0,
    Failure = 1,
    Usage = 2,
    BadData = 65,
    Busy = 75,
    BadConfig = 78,
}

#[derive(Debug, Parser)]
#[command(
    name = "tidegate",
    version,
    about = "Keeps a tabular neural-network model up to date as data arrives, with a paired-test gate and an audit log."
)]
pub struct Cli {
    /// State directory.
    #[arg(
        long,
        global = true,
        env = "TIDEGATE_STATE",
        default_value = "state",
        value_name = "DIR"
    )]
    pub state: PathBuf,
    /// Config file (default: the copy in the state dir; for init: the one to use).
    #[arg(long, global = true, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Print data as JSON (JSON Lines for lists).
    #[arg(long, global = true)]
    pub json: bool,
    /// More log output on stderr (-v, -vv).
    #[arg(short, long, global = true, action = clap::ArgAction::Count)]
    pub verbose: u8,
    /// Only errors on stderr.
    #[arg(short, long, global = true)]
    pub quiet: bool,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Create a state dir from a config, or write a commented config template.
    Init(init::Args),
    /// Validate CSV files and append them to the store (all rows of a file or none).
    Ingest(ingest::Args),
    /// Rows, batches, vocabularies, recent events and whether a process owns the state dir.
    Status(status::Args),
    /// Query the audit log (reads audit.jsonl only).
    Log(log::Args),
    /// Run one retrain cycle now: candidates, the gate, promote or keep.
    Retrain(retrain::Args),
    /// Model versions with their parents, holdout loss and decisions.
    Models(models::Args),
    /// Make an earlier model serve again.
    Rollback(rollback::Args),
    /// Let the candidate waiting for approval serve.
    Approve(approve::Args),
    /// Turn the candidate waiting for approval down.
    Decline(decline::Args),
    /// Score a CSV file with the serving model (or --model ID).
    Predict(predict::Args),
    /// Check the audit chain, the store against the log, and the archive.
    Verify(verify::Args),
    /// Write a self-contained HTML page with charts of the models, data and audit log.
    Report(report::Args),
}

/// Runs a parsed command line.
pub fn run(cli: &Cli) -> anyhow::Result<Exit> {
    let state = StateDir::new(&cli.state);
    match &cli.command {
        Command::Init(a) => init::run(cli, &state, a),
        Command::Ingest(a) => ingest::run(cli, &state, a),
        Command::Status(a) => status::run(cli, &state, a),
        Command::Log(a) => log::run(cli, &state, a),
        Command::Verify(a) => verify::run(cli, &state, a),
        Command::Predict(a) => predict::run(cli, &state, a),
        Command::Retrain(a) => retrain::run(cli, &state, a),
        Command::Models(a) => models::run(cli, &state, a),
        Command::Rollback(a) => rollback::run(cli, &state, a),
        Command::Approve(a) => approve::run(cli, &state, a),
        Command::Decline(a) => decline::run(cli, &state, a),
        Command::Report(a) => report::run(cli, &state, a),
    }
}

/// The exit code for a failure, from the error's cause.
pub fn exit_for(err: &anyhow::Error) -> Exit {
    for cause in err.chain() {
        if let Some(e) = cause.downcast_ref::<StoreError>() {
            return match e {
                StoreError::Locked { .. } => Exit::Busy,
                StoreError::SchemaChanged { .. } => Exit::BadConfig,
                _ => Exit::Failure,
            };
        }
        if let Some(e) = cause.downcast_ref::<StateError>() {
            if let StateError::Store(StoreError::Locked { .. }) = e {
                return Exit::Busy;
            }
            if let StateError::Store(StoreError::SchemaChanged { .. }) = e {
                return Exit::BadConfig;
            }
        }
        if cause.downcast_ref::<ConfigError>().is_some() {
            return Exit::BadConfig;
        }
        if let Some(e) = cause.downcast_ref::<std::io::Error>()
            && e.kind() == std::io::ErrorKind::BrokenPipe
        {
            return Exit::Ok;
        }
    }
    Exit::Failure
}

/// The config to use: `--config`, else the copy kept in the state dir.
pub(crate) fn load_config(cli: &Cli, state: &StateDir) -> anyhow::Result<Config> {
    let path = match &cli.config {
        Some(p) => p.clone(),
        None => {
            let p = state.config();
            if !p.exists() {
                return Err(StoreError::NotInitialised {
                    path: state.root().to_path_buf(),
                }
                .into());
            }
            p
        }
    };
    Ok(Config::load(&path)?)
}

/// Opens the state dir as owner, takes one decision about model versions
/// (approve, decline, rollback) and prints its audit entry.
pub(crate) fn run_decision(
    cli: &Cli,
    state: &StateDir,
    decide: impl FnOnce(
        &mut crate::state::Owner,
        &str,
    ) -> Result<crate::audit::Entry, crate::lifecycle::DecisionError>,
) -> anyhow::Result<Exit> {
    let config = load_config(cli, state)?;
    let (mut owner, _) = crate::state::open(state, &config)?;
    let entry = decide(&mut owner, &crate::state::current_user())?;
    let text = if cli.json {
        format!("{}\n", entry.line())
    } else {
        format!("{}\n", entry.event.summary())
    };
    emit(&text)?;
    Ok(Exit::Ok)
}

/// Writes to stdout; a closed pipe (`| head`) is not a failure.
pub(crate) fn emit(text: &str) -> anyhow::Result<()> {
    let mut out = std::io::stdout().lock();
    match out.write_all(text.as_bytes()).and_then(|()| out.flush()) {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        Err(e) => Err(e.into()),
    }
}

/// A state-relative path for messages.
pub(crate) fn shown(state: &StateDir, p: &Path) -> String {
    p.strip_prefix(state.root())
        .map_or_else(|_| p.display().to_string(), |r| r.display().to_string())
}

/// Renders rows as a left-aligned text table with a header.
pub(crate) fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    for r in rows {
        for (i, c) in r.iter().enumerate() {
            if i < widths.len() {
                widths[i] = widths[i].max(c.chars().count());
            }
        }
    }
    let mut out = String::new();
    let mut line = |cells: Vec<&str>| {
        let n = cells.len();
        for (i, c) in cells.into_iter().enumerate() {
            out.push_str(c);
            if i + 1 < n {
                out.push_str(&" ".repeat(widths[i] - c.chars().count() + 2));
            }
        }
        out.push('\n');
    };
    line(header.to_vec());
    for r in rows {
        line(r.iter().map(String::as_str).collect());
    }
    out
}
