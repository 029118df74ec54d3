//! `tidegate set-aside BATCH --reason TEXT` and `tidegate bring-back BATCH
//! --reason TEXT`: take a stored batch out of use, or put it back; recorded
//! with the acting user.

use super::{Cli, Exit, emit, render_decision};
use crate::ids::BatchId;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The stored batch (see `tidegate status` or `tidegate log`).
    #[arg(value_name = "BATCH")]
    batch: BatchId,
    /// Why, for the audit log.
    #[arg(long, value_name = "TEXT")]
    reason: String,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args, aside: bool) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    let (mut owner, _) = crate::state::open(state, &config)?;
    let entry = crate::aside::change(
        &mut owner,
        args.batch,
        aside,
        &args.reason,
        &crate::state::current_user(),
    )?;
    emit(&render_decision(&entry, cli.json))?;
    Ok(Exit::Ok)
}
