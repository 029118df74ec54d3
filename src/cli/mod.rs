//! Command-line interface: argument types (clap), one file per command, and
//! the mapping of failures to exit codes. Commands print data on stdout and
//! messages on stderr; `--json` switches data to JSON.

mod approve;
mod aside;
mod backup;
mod columns;
mod completions;
mod decline;
mod demo;
mod ingest;
mod init;
mod log;
mod migrate;
mod models;
mod onnx;
mod predict;
mod report;
mod retrain;
mod rollback;
mod status;
mod verify;
mod watch;

use std::io::Write;
use std::path::{Path, PathBuf};

use clap::{Parser, Subcommand};

pub(crate) use backup::render_backup;
pub(crate) use ingest::take_files as ingest_files;
pub(crate) use retrain::render as render_cycle;
pub(crate) use verify::{error as verify_error, render as render_verify};

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
    /// The daemon refused a control connection from another uid.
    Refused = 77,
    BadConfig = 78,
}

#[derive(Debug, Parser)]
#[command(
    name = "tidegate",
    version,
    about = "Keeps a tabular neural-network model up to date as data arrives, with a paired-test gate and an audit log."
)]
pub struct Cli {
    /// State directory [default: ./state].
    #[arg(long, global = true, env = "TIDEGATE_STATE", value_name = "DIR")]
    pub state: Option<PathBuf>,
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
    /// Colours in tables: auto (on a terminal, unless NO_COLOR is set), always or never.
    #[arg(
        long,
        global = true,
        value_enum,
        default_value = "auto",
        value_name = "WHEN"
    )]
    pub color: ColorWhen,
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
    /// What the stored rows hold, column by column, read from the row files.
    Columns(columns::Args),
    /// Make an earlier model serve again.
    Rollback(rollback::Args),
    /// Let the candidate waiting for approval serve.
    Approve(approve::Args),
    /// Turn the candidate waiting for approval down.
    Decline(decline::Args),
    /// Keep a stored batch out of training, holdout, baselines and drift (--reason).
    SetAside(aside::Args),
    /// Put a batch that was set aside back into use (--reason).
    BringBack(aside::Args),
    /// Score a CSV file with the serving model (or --model ID).
    Predict(predict::Args),
    /// Write the serving model (or --model ID) as an ONNX file with a manifest beside it.
    Onnx(onnx::Args),
    /// Check the audit chain, the store against the log, and the archive.
    Verify(verify::Args),
    /// Run the bundled bakery scenario (invented data) night by night in a scratch state dir.
    Demo(demo::Args),
    /// Print a shell completion script (bash, zsh, fish, elvish, powershell).
    Completions(completions::Args),
    /// Write a consistent copy of the state dir (store, log, archive, models) to a folder.
    Backup(backup::BackupArgs),
    /// Recreate a state dir (--state) from a backup, check it and verify it.
    Restore(backup::RestoreArgs),
    /// Take a config whose columns changed (--config NEW.toml): rewrite the stored rows.
    Migrate(migrate::Args),
    /// Run as the daemon: take inbox files, retrain as data arrives, answer the CLI.
    Watch(watch::Args),
    /// Write a self-contained HTML page with charts of the models, data and audit log.
    Report(report::Args),
}

/// Runs a parsed command line.
pub fn run(cli: &Cli) -> anyhow::Result<Exit> {
    match &cli.command {
        Command::Demo(a) => return demo::run(cli, a),
        Command::Completions(a) => return completions::run(a),
        _ => {}
    }
    let state = StateDir::new(cli.state.clone().unwrap_or_else(|| PathBuf::from("state")));
    match &cli.command {
        Command::Demo(_) | Command::Completions(_) => unreachable!("handled above"),
        Command::Init(a) => init::run(cli, &state, a),
        Command::Ingest(a) => ingest::run(cli, &state, a),
        Command::Status(a) => status::run(cli, &state, a),
        Command::Log(a) => log::run(cli, &state, a),
        Command::Verify(a) => verify::run(cli, &state, a),
        Command::Backup(a) => backup::run_backup(cli, &state, a),
        Command::Migrate(a) => migrate::run(cli, &state, a),
        Command::Restore(a) => backup::run_restore(cli, &state, a),
        Command::Predict(a) => predict::run(cli, &state, a),
        Command::Onnx(a) => onnx::run(cli, &state, a),
        Command::Retrain(a) => retrain::run(cli, &state, a),
        Command::Models(a) => models::run(cli, &state, a),
        Command::Columns(a) => columns::run(cli, &state, a),
        Command::Rollback(a) => rollback::run(cli, &state, a),
        Command::Approve(a) => approve::run(cli, &state, a),
        Command::Decline(a) => decline::run(cli, &state, a),
        Command::SetAside(a) => aside::run(cli, &state, a, true),
        Command::BringBack(a) => aside::run(cli, &state, a, false),
        Command::Watch(a) => watch::run(cli, &state, a),
        Command::Report(a) => report::run(cli, &state, a),
    }
}

/// The exit code for a failure, from the error's cause.
/// An error and its causes on one line, each cause once: many errors
/// already quote their cause in their own message ("PATH: CAUSE"), and
/// printing the chain as well would say it twice.
pub fn error_text(err: &anyhow::Error) -> String {
    let mut out = String::new();
    for cause in err.chain() {
        let text = cause.to_string();
        if out.contains(&text) {
            continue;
        }
        if !out.is_empty() {
            out.push_str(": ");
        }
        out.push_str(&text);
    }
    out
}

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

/// Takes one decision recorded as a single audit entry (approve, decline,
/// rollback, set-aside, bring-back) and prints that entry: through the
/// running daemon when there is one, else as the owner of the state dir.
pub(crate) fn run_decision<E>(
    cli: &Cli,
    state: &StateDir,
    request: crate::daemon::Request,
    decide: impl FnOnce(&mut crate::state::Owner, &str) -> Result<crate::audit::Entry, E>,
) -> anyhow::Result<Exit>
where
    E: std::error::Error + Send + Sync + 'static,
{
    // A running daemon owns the state dir: it takes the decision in its loop.
    if let Some(exit) = crate::daemon::client::route(state, &request, cli.json)? {
        return Ok(exit);
    }
    let config = load_config(cli, state)?;
    let (mut owner, _) = crate::state::open(state, &config)?;
    let entry = decide(&mut owner, &crate::state::current_user())?;
    emit(&render_decision(&entry, cli.json))?;
    Ok(Exit::Ok)
}

/// A decision's audit entry as printed; the daemon answers with the same.
pub(crate) fn render_decision(entry: &crate::audit::Entry, json: bool) -> String {
    if json {
        format!("{}\n", entry.line())
    } else {
        format!("{}\n", entry.event.summary())
    }
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

/// When to colour terminal output.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ColorWhen {
    /// On a terminal, unless NO_COLOR is set.
    Auto,
    Always,
    Never,
}

impl Cli {
    /// Whether tables on stdout get colours.
    pub(crate) fn colored(&self) -> bool {
        match self.color {
            ColorWhen::Always => true,
            ColorWhen::Never => false,
            ColorWhen::Auto => {
                std::io::IsTerminal::is_terminal(&std::io::stdout())
                    && std::env::var_os("NO_COLOR").is_none_or(|v| v.is_empty())
            }
        }
    }
}

/// The colour of a cell that names an outcome, if it has one: green for a
/// model that serves, yellow for one held back, red for what went wrong or
/// was undone, cyan for what waits on a person.
fn outcome_color(cell: &str) -> Option<&'static str> {
    let word = cell.split_whitespace().next().unwrap_or("");
    match word.trim_end_matches(',') {
        "promote" | "promoted" | "approved" | "accepted" | "steady" => Some("32"),
        "keep" | "shelved" | "declined" | "duplicate" | "batch-duplicate" | "shifted" => Some("33"),
        "rolled-back" | "batch-refused" | "refused" | "regressed" | "cycle-abandoned"
        | "schema-migrated" => Some("31"),
        "awaiting-approval" | "await-approval" => Some("36"),
        _ => None,
    }
}

fn is_number(cell: &str) -> bool {
    let c = cell.trim_end_matches(" *");
    !c.is_empty() && c != "-" && c.parse::<f64>().is_ok()
}

/// Renders rows as a text table with a header: numeric columns right-
/// aligned, the rest left-aligned, outcome words coloured when `color`.
pub(crate) fn table_styled(header: &[&str], rows: &[Vec<String>], color: bool) -> String {
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    let mut numeric = vec![true; header.len()];
    for r in rows {
        for (i, c) in r.iter().enumerate().take(widths.len()) {
            widths[i] = widths[i].max(c.chars().count());
            if !(c.is_empty() || c == "-" || is_number(c)) {
                numeric[i] = false;
            }
        }
    }
    let mut out = String::new();
    let mut line = |cells: Vec<&str>, head: bool| {
        let n = cells.len();
        for (i, c) in cells.into_iter().enumerate() {
            let pad = " ".repeat(widths[i].saturating_sub(c.chars().count()));
            let right = numeric[i] && !head;
            let paint = if head || !color {
                None
            } else {
                outcome_color(c)
            };
            let text = match paint {
                Some(code) => format!("\x1b[{code}m{c}\x1b[0m"),
                None => c.to_string(),
            };
            if right {
                out.push_str(&pad);
                out.push_str(&text);
            } else {
                out.push_str(&text);
                if i + 1 < n {
                    out.push_str(&pad);
                }
            }
            if i + 1 < n {
                out.push_str("  ");
            }
        }
        out.push('\n');
    };
    line(header.to_vec(), true);
    for r in rows {
        line(r.iter().map(String::as_str).collect(), false);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tables_align_numbers_right_and_colour_outcomes_only_when_asked() {
        let rows = vec![
            vec![
                "m000001".to_string(),
                "12.5".to_string(),
                "promoted".to_string(),
            ],
            vec![
                "m000002".to_string(),
                "3".to_string(),
                "shelved".to_string(),
            ],
        ];
        let plain = table_styled(&["model", "loss", "decision"], &rows, false);
        let lines: Vec<&str> = plain.lines().collect();
        assert_eq!(lines[1], "m000001  12.5  promoted");
        assert_eq!(lines[2], "m000002     3  shelved");
        assert!(!plain.contains('\x1b'));
        let colored = table_styled(&["model", "loss", "decision"], &rows, true);
        assert!(colored.contains("\x1b[32mpromoted\x1b[0m"), "{colored:?}");
        assert!(colored.contains("\x1b[33mshelved\x1b[0m"), "{colored:?}");
        assert!(
            colored.lines().next().unwrap().starts_with("model"),
            "header plain"
        );
    }
}
