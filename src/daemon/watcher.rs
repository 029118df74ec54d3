//! The inbox watcher: notify's events are turned into wake-ups for the
//! loop, which then lists the inbox itself. A lost or overflowed event
//! costs nothing more than a wait for the next timed listing.

use std::path::Path;
use std::sync::mpsc::Sender;

use notify::{EventKind, RecommendedWatcher, RecursiveMode, Watcher};

use super::event_loop::Event;

/// Starts watching `inbox`; `None` (with a warning) when the system will
/// not watch it, in which case the timed listing alone finds files.
pub fn start(inbox: &Path, events: Sender<Event>) -> Option<RecommendedWatcher> {
    let handler = move |result: notify::Result<notify::Event>| {
        let event = match result {
            Ok(e) if e.need_rescan() => Event::Rescan,
            // Opening or reading the inbox (the loop's own listing does)
            // changes nothing; counting it would keep the inbox from ever
            // looking quiet.
            Ok(e) if matches!(e.kind, EventKind::Access(_)) => return,
            Ok(_) => Event::InboxChanged,
            Err(_) => Event::Rescan,
        };
        let _ = events.send(event);
    };
    let mut watcher = match notify::recommended_watcher(handler) {
        Ok(w) => w,
        Err(e) => {
            tracing::warn!("cannot watch the inbox ({e}); listing it every rescan_seconds instead");
            return None;
        }
    };
    if let Err(e) = watcher.watch(inbox, RecursiveMode::NonRecursive) {
        tracing::warn!(
            "cannot watch {} ({e}); listing it every rescan_seconds instead",
            inbox.display()
        );
        return None;
    }
    Some(watcher)
}
