//! `tidegate set-aside BATCH --reason TEXT` and `tidegate bring-back BATCH
//! --reason TEXT`: take a stored batch out of use, or put it back; recorded
//! with the acting user. A running daemon does it in its loop (between
//! cycles, like every decision); otherwise the command opens the store.

use super::{Cli, Exit};
use crate::daemon::Request;
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
    let (batch, reason) = (args.batch, args.reason.clone());
    let request = if aside {
        Request::SetAside { batch, reason }
    } else {
        Request::BringBack { batch, reason }
    };
    super::run_decision(cli, state, request, |owner, user| {
        crate::aside::change(owner, args.batch, aside, &args.reason, user)
    })
}
