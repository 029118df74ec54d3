//! `tidegate rollback [--to ID] --reason TEXT`: make an earlier model serve
//! again (by default the one that served before the current one).

use super::{Cli, Exit};
use crate::ids::ModelId;
use crate::lifecycle;
use crate::state::StateDir;

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
    let request = crate::daemon::Request::Rollback {
        to: args.to,
        reason: args.reason.clone(),
    };
    super::run_decision(cli, state, request, |owner, user| {
        lifecycle::rollback(owner, args.to, &args.reason, user)
    })
}
