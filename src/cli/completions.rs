//! `tidegate completions SHELL`: a completion script for the shell, on stdout.

use clap::CommandFactory;

use super::{Cli, Exit, emit};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// bash, zsh, fish, elvish or powershell.
    shell: clap_complete::Shell,
}

pub fn run(args: &Args) -> anyhow::Result<Exit> {
    let mut command = Cli::command();
    let mut out = Vec::new();
    clap_complete::generate(args.shell, &mut command, "tidegate", &mut out);
    emit(&String::from_utf8_lossy(&out))?;
    Ok(Exit::Ok)
}
