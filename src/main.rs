//! The `tidegate` binary: parse arguments, set up logging on stderr, run
//! the command, map the outcome to an exit code.

use std::process::ExitCode;

use clap::Parser;
use tidegate::cli::{self, Cli, Exit};

// Training allocates and frees tensors of up to megabytes every mini-batch;
// glibc malloc returns them to the kernel and page-faults them back in, and
// mimalloc keeps them (`cargo run --release --example bench_train` compares
// the two in the same run).
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() -> ExitCode {
    let parsed = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { Exit::Usage as u8 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    let level = match (parsed.quiet, parsed.verbose) {
        (true, _) => "error",
        (false, 0) => "info",
        (false, 1) => "debug",
        (false, _) => "trace",
    };
    let filter = tracing_subscriber::EnvFilter::try_from_env("TIDEGATE_LOG")
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(format!("tidegate={level}")));
    tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(
            std::io::IsTerminal::is_terminal(&std::io::stderr())
                && std::env::var_os("NO_COLOR").is_none(),
        )
        .with_target(false)
        .without_time()
        .init();
    match cli::run(&parsed) {
        Ok(code) => ExitCode::from(code as u8),
        Err(err) => {
            let code = cli::exit_for(&err);
            if code != Exit::Ok {
                eprintln!("error: {}", cli::error_text(&err));
            }
            ExitCode::from(code as u8)
        }
    }
}
