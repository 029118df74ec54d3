//! `tidegate report`: writes the HTML report of the state dir (see
//! `report`). Reads files only, so it works while another process owns the
//! state dir.

use std::path::{Path, PathBuf};

use anyhow::Context;

use super::{Cli, Exit, emit};
use crate::report::{self, Options};
use crate::schema::Schema;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Where to write the page (default: <state>/report.html).
    #[arg(long, value_name = "FILE")]
    out: Option<PathBuf>,
    /// Number input across the response map (default: the first number input).
    #[arg(long, value_name = "COL")]
    x: Option<String>,
    /// Number input up the response map (default: the next number input).
    #[arg(long, value_name = "COL")]
    y: Option<String>,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    if (args.x.is_some() || args.y.is_some())
        && let Err(why) = report::scan::pick_axes(
            &Schema::from_config(&config),
            args.x.as_deref(),
            args.y.as_deref(),
        )
    {
        eprintln!("error: {why}");
        return Ok(Exit::Usage);
    }
    let options = Options {
        x: args.x.clone(),
        y: args.y.clone(),
    };
    let built = report::build(state, &config, &options, chrono::Utc::now())?;
    let out = args
        .out
        .clone()
        .unwrap_or_else(|| state.root().join("report.html"));
    // A bare file name is written in the current folder.
    let out = match out.parent() {
        Some(p) if p.as_os_str().is_empty() => Path::new(".").join(&out),
        _ => out,
    };
    crate::fsutil::write_atomic(&out, built.html.as_bytes()).with_context(|| {
        format!(
            "cannot write the report to {}; check the folder exists and is writable, or pick another --out",
            out.display()
        )
    })?;
    tracing::info!(
        "{} charts, {} audit entries, {} bytes",
        built.charts,
        built.events,
        built.html.len()
    );
    if cli.json {
        emit(&format!(
            "{}\n",
            serde_json::json!({
                "report": out.display().to_string(),
                "charts": built.charts,
                "events": built.events,
            })
        ))?;
    } else {
        emit(&format!("{}\n", out.display()))?;
    }
    Ok(Exit::Ok)
}
