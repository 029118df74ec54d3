//! `tidegate rollback [--to ID] --reason TEXT`: make an earlier model serve
//! again (by default the one that served before the current one).

use super::{Cli, Exit, emit};
use crate::ids::ModelId;
use crate::lifecycle;
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The model to serve (default: the one that served before the current one).
    #[arg(long, value_name = "ID")]
    to: Option<ModelId>,
    /// Why, for the audit log.
    #[arg(long, value_name = "TEXT")]
    reason: String,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    let (mut owner, _) = state::open(state, &config)?;
    let entry = lifecycle::rollback(&mut owner, args.to, &args.reason, &state::current_user())?;
    let text = if cli.json {
        format!("{}\n", entry.line())
    } else {
        format!("{}\n", entry.event.summary())
    };
    emit(&text)?;
    Ok(Exit::Ok)
}
