//! `tidegate init`: create a state dir from a config, or write a template.

use std::path::PathBuf;

use anyhow::Context;

use super::{Cli, Exit, emit};
use crate::config::{Config, TEMPLATE};
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Write a commented config template to FILE ("-" for stdout) and stop.
    #[arg(long, value_name = "FILE")]
    template: Option<PathBuf>,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    if let Some(dest) = &args.template {
        if dest.as_os_str() == "-" {
            emit(TEMPLATE)?;
            return Ok(Exit::Ok);
        }
        if dest.exists() {
            anyhow::bail!("{} already exists; choose another name or remove it first", dest.display());
        }
        crate::fsutil::write_atomic(dest, TEMPLATE.as_bytes()).with_context(|| format!("cannot write {}", dest.display()))?;
        tracing::info!("wrote a config template to {}; edit its [data] section, then run: tidegate init --config {}", dest.display(), dest.display());
        return Ok(Exit::Ok);
    }
    let Some(config_path) = &cli.config else {
        anyhow::bail!("tidegate init needs --config FILE (write a starting point with: tidegate init --template tidegate.toml)");
    };
    let text = std::fs::read_to_string(config_path).with_context(|| format!("cannot read config {}", config_path.display()))?;
    let config = Config::parse(&text, config_path)?;
    let owner = state::create(state, &config, &text, &state::current_user())?;
    let summary = serde_json::json!({
        "state": state.root(),
        "inbox": state.inbox(),
        "schema_fingerprint": config.schema_fingerprint(),
        "columns": config.data.columns.len(),
        "target": config.data.target.get_ref(),
    });
    drop(owner);
    if cli.json {
        emit(&format!("{summary}\n"))?;
    } else {
        emit(&format!(
            "created state dir {} ({} columns, target {}); drop CSV files into {} or run: tidegate --state {} ingest FILE\n",
            state.root().display(),
            config.data.columns.len(),
            config.data.target.get_ref(),
            state.inbox().display(),
            state.root().display()
        ))?;
    }
    Ok(Exit::Ok)
}
