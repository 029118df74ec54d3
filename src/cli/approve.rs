//! `tidegate approve ID --reason TEXT`: decide on the candidate waiting in
//! approval mode; recorded with the acting user.

use super::{Cli, Exit};
use crate::ids::ModelId;
use crate::lifecycle;
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The waiting candidate (see `tidegate status`).
    #[arg(value_name = "ID")]
    pub(super) model: ModelId,
    /// Why, for the audit log.
    #[arg(long, value_name = "TEXT")]
    pub(super) reason: String,
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let request = crate::daemon::Request::Approve {
        model: args.model,
        reason: args.reason.clone(),
    };
    super::run_decision(cli, state, request, |owner, user| {
        lifecycle::approve(owner, args.model, &args.reason, user)
    })
}
