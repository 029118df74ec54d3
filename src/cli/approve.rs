//! `tidegate approve ID --reason TEXT`: decide on the candidate waiting in
//! approval mode; recorded with the acting user.

use super::{Cli, Exit, emit};
use crate::ids::ModelId;
use crate::lifecycle;
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The waiting candidate (see `tidegate status`).
    #[arg(value_name = "ID")]
    model: ModelId,
    /// Why, for the audit log.
    #[arg(long, value_name = "TEXT")]
    reason: String,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    let (mut owner, _) = state::open(state, &config)?;
    let entry = lifecycle::approve(&mut owner, args.model, &args.reason, &state::current_user())?;
    let text = if cli.json {
        format!("{}\n", entry.line())
    } else {
        format!("{}\n", entry.event.summary())
    };
    emit(&text)?;
    Ok(Exit::Ok)
}
