//! `tidegate decline ID --reason TEXT`: decide on the candidate waiting in
//! approval mode; recorded with the acting user.

use super::{Cli, Exit};
use crate::lifecycle;
use crate::state::StateDir;

/// The same arguments as `approve`: the waiting candidate and why.
pub use super::approve::Args;

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    let request = crate::daemon::Request::Decline {
        model: args.model,
        reason: args.reason.clone(),
    };
    super::run_decision(cli, state, request, |owner, user| {
        lifecycle::decline(owner, args.model, &args.reason, user)
    })
}
