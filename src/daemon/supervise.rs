//! systemd supervision (`Type=notify`): READY once the lock is held,
//! recovery is done and the inbox was listed; watchdog pings only from the
//! loop, after it finished an iteration, so a stuck loop stops pinging;
//! STOPPING on shutdown. Outside systemd every call does nothing.

use std::time::{Duration, Instant};

use sd_notify::NotifyState;

pub struct Supervisor {
    watchdog: Option<Duration>,
    last_ping: Instant,
}

impl Supervisor {
    pub fn from_env() -> Supervisor {
        Supervisor {
            watchdog: sd_notify::watchdog_enabled(),
            last_ping: Instant::now(),
        }
    }

    pub fn ready(&self, status: &str) {
        send(&[NotifyState::Ready, NotifyState::Status(status)]);
    }

    /// Called by the loop after each iteration.
    pub fn alive(&mut self) {
        if let Some(every) = self.watchdog
            && self.last_ping.elapsed() >= every / 2
        {
            send(&[NotifyState::Watchdog]);
            self.last_ping = Instant::now();
        }
    }

    pub fn stopping(&self) {
        send(&[NotifyState::Stopping, NotifyState::Status("stopping")]);
    }
}

fn send(states: &[NotifyState]) {
    if let Err(e) = sd_notify::notify(states) {
        tracing::debug!("cannot notify the service manager: {e}");
    }
}
