//! SIGTERM and SIGINT: the first asks the loop to stop cleanly, a second
//! one ends the process at once (correctness never depends on a clean stop).

use std::sync::mpsc::Sender;

use signal_hook::consts::{SIGINT, SIGTERM};
use signal_hook::iterator::Signals;

use super::event_loop::Event;

/// Starts the thread that turns signals into `Event::Shutdown`.
pub fn install(events: Sender<Event>) -> std::io::Result<()> {
    let mut signals = Signals::new([SIGTERM, SIGINT])?;
    std::thread::Builder::new()
        .name("signals".into())
        .spawn(move || {
            let mut seen = 0;
            for signal in signals.forever() {
                seen += 1;
                if seen == 1 {
                    tracing::info!("signal {signal}: stopping (send it again to exit at once)");
                    let _ = events.send(Event::Shutdown);
                } else {
                    eprintln!("signal {signal} again: exiting at once");
                    std::process::exit(128 + signal);
                }
            }
        })?;
    Ok(())
}
