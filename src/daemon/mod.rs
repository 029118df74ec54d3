//! `tidegate watch`: the daemon. It owns the state dir (`LOCK`), takes
//! files published to the inbox, starts retrain cycles as data arrives,
//! and runs the commands the CLI sends over `control.sock`.
//!
//! Threads and who owns what:
//! - the loop (`event_loop`) owns the store; every change goes through it;
//! - a worker takes the owner for the length of one cycle and hands it back;
//! - the watcher, the signal thread, the ticker (the loop's own receive
//!   timeout) and one thread per control connection only send events;
//! - `ping` and `/metrics` read what the loop last published (`metrics`);
//! - the prediction endpoint (`endpoint`) answers on threads of its own
//!   from a model slot that the loop swaps when the serving model changes.

pub mod client;
mod control;
pub mod event_loop;
pub mod inbox;
pub mod metrics;
pub mod protocol;
mod signals;
mod supervise;
#[cfg(test)]
mod tests;
pub mod trigger;
mod watcher;

use std::sync::mpsc::{self, RecvTimeoutError};

pub use event_loop::{Clock, Daemon, Event, Flow, SystemClock, after_accept};
pub use protocol::{Answer, DaemonStatus, Request};

use crate::cli::Exit;
use crate::config::Config;
use crate::state::{self, StateDir};

/// Runs the daemon until a signal stops it (exit 0) or the machine fails
/// (an error: I/O, store, fsync; the supervisor restarts it).
pub fn run(state: &StateDir, config: &Config) -> anyhow::Result<Exit> {
    let (owner, recovery) = state::open(state, config)?;
    if recovery != state::Recovery::default() {
        tracing::info!("recovered after an interrupted run: {recovery:?}");
    }
    let (tx, rx) = mpsc::channel();
    signals::install(tx.clone())?;
    let shared = metrics::Shared::new(DaemonStatus {
        pid: std::process::id(),
        version: env!("CARGO_PKG_VERSION").to_string(),
        started_at: chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true),
        activity: "starting".into(),
        train_at: config.daemon.train_at.clone(),
        ..DaemonStatus::default()
    });
    let mut daemon = Daemon::new(owner, SystemClock, tx.clone(), shared.clone())?;
    let _watcher = watcher::start(daemon.inbox(), tx.clone());
    let socket = state.control_socket();
    let listener = control::bind(&socket)?;
    control::serve(listener, tx.clone(), shared.clone())?;
    if let Some(addr) = &config.daemon.metrics_addr {
        let addr: std::net::SocketAddr = addr.parse().map_err(|e| {
            anyhow::anyhow!(
                "[daemon] metrics_addr {addr:?} is not an address like {}: {e}",
                crate::config::EXAMPLE_METRICS_ADDR
            )
        })?;
        let bound = metrics::serve(addr, shared.clone()).map_err(|e| {
            anyhow::anyhow!("cannot serve metrics on {addr} ([daemon] metrics_addr): {e}")
        })?;
        tracing::info!("metrics on http://{bound}/metrics");
    }
    if let Some(addr) = &config.daemon.predict_addr {
        let addr: std::net::SocketAddr = addr.parse().map_err(|e| {
            anyhow::anyhow!(
                "[daemon] predict_addr {addr:?} is not an address like 127.0.0.1:9188: {e}"
            )
        })?;
        let slot = crate::endpoint::Slot::new();
        daemon.serve_predictions(crate::endpoint::Follower::new(
            slot.clone(),
            state.models(),
            config.clone(),
        ));
        let limits = crate::endpoint::Limits::of(&config.daemon);
        let bound = crate::endpoint::serve(addr, slot, limits).map_err(|e| {
            anyhow::anyhow!("cannot serve predictions on {addr} ([daemon] predict_addr): {e}")
        })?;
        tracing::info!("predictions on http://{bound}/predict");
    }
    drop(tx);
    let mut supervisor = supervise::Supervisor::from_env();
    // The first listing before READY, so a supervisor sees files found.
    let mut flow = daemon.step(Event::Rescan)?;
    supervisor.ready("watching the inbox");
    tracing::info!(
        "watching {} ({} untrained rows; a cycle starts at {})",
        daemon.inbox().display(),
        daemon.untrained_rows(),
        config.daemon.min_new_rows
    );
    let result = loop {
        if let Flow::Exit(code) = flow {
            break Ok(code);
        }
        supervisor.alive();
        let event = match rx.recv_timeout(daemon.tick_every()) {
            Ok(e) => e,
            Err(RecvTimeoutError::Timeout) => Event::Tick,
            Err(RecvTimeoutError::Disconnected) => Event::Shutdown,
        };
        if matches!(event, Event::Shutdown) {
            supervisor.stopping();
        }
        flow = match daemon.step(event) {
            Ok(f) => f,
            Err(e) => break Err(e),
        };
    };
    // The socket goes before the lock, so a client never reaches a
    // socket whose daemon let go of the state dir.
    let _ = std::fs::remove_file(&socket);
    drop(daemon);
    if result.is_ok() {
        tracing::info!("stopped");
    }
    result
}
