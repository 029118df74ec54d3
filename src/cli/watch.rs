//! `tidegate watch`: run the daemon in the foreground until SIGTERM or
//! SIGINT (see `daemon`). Logs go to stderr.

use super::{Cli, Exit};
use crate::state::StateDir;

#[derive(Debug, clap::Args)]
pub struct Args {}

pub fn run(cli: &Cli, state: &StateDir, _args: &Args) -> anyhow::Result<Exit> {
    let config = super::load_config(cli, state)?;
    crate::daemon::run(state, &config)
}
