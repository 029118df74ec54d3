//! Named points where tests make the process fail on purpose, to prove
//! that a crash or an I/O error at that moment loses nothing and leaves no
//! partial state. Inactive unless `TIDEGATE_FAILPOINTS` is set, e.g.
//! `TIDEGATE_FAILPOINTS=intake:after-commit=abort,cycle:before-promote=enospc`.
//!
//! Actions: `abort` (the process dies at once, as in a crash or a kill),
//! `enospc` (the step fails with "No space left on device"), `eio` (an I/O
//! error, as a failing fsync reports). The variable is read once.
//!
//! `point=action@N` acts only at the Nth time the process reaches the
//! point (counted from 1), so a test can fail, say, the second store flush
//! of a command (the fresh-data check's) and not the first (the batch's).
//!
//! One setting is not a failure: `store:flush-every=N` makes the store's
//! background flusher run every N ms (sled's own default is 500), so that a
//! power-loss test sees it make writes durable between any two of the
//! process's own steps, as a slow or loaded machine does.

use std::sync::Mutex;
use std::sync::OnceLock;

/// Every point, for documentation and validation, in the order a file and
/// a cycle meet them.
pub const POINTS: &[&str] = &[
    // Intake of one file (`intake::take_file`).
    "intake:after-validate",
    "intake:after-pending",
    // After a batch's row file is written and synced, before the store
    // transaction that names it (`store::write_rows_file`; also when an old
    // store's rows are moved to files, or a migration rewrites them).
    "store:after-row-file",
    // Inside the store transaction, after some of its writes are staged:
    // nothing of it may become visible.
    "store:mid-transaction",
    // After any store transaction committed and before its flush and fsync.
    "store:before-flush",
    // After the flush and fsync of the store.
    "store:after-flush",
    "intake:after-commit",
    // After the audit line is appended, just before the archive move.
    "intake:after-audit",
    // After the pending file is renamed into the archive, before the source
    // leaves the inbox.
    "intake:after-archive",
    // Before the fresh-data check of a batch just stored (`fresh::check_batch`).
    "fresh:before-check",
    // A retrain cycle.
    "cycle:mid-checkpoint",
    "cycle:before-promote",
    "cycle:after-promote",
    // Following the serving model with an ONNX export (`export::write`),
    // after the pointer moved and before the file is replaced.
    "export:before-write",
    // Start-up recovery (`state::open`): after stale temps are removed, and
    // after pending archive files are settled, before `audit.jsonl` is caught up.
    "state:during-recovery",
    "state:before-catch-up",
];

/// One armed point: its action and, for `@N`, the one hit it acts on.
struct Armed {
    name: String,
    action: String,
    at: Option<u64>,
}

fn armed() -> &'static Vec<Armed> {
    static ARMED: OnceLock<Vec<Armed>> = OnceLock::new();
    ARMED.get_or_init(|| {
        std::env::var("TIDEGATE_FAILPOINTS")
            .unwrap_or_default()
            .split(',')
            .filter_map(|p| p.split_once('='))
            .map(|(n, a)| {
                let (action, at) = match a.split_once('@') {
                    Some((action, at)) => (action, at.trim().parse().ok()),
                    None => (a, None),
                };
                Armed {
                    name: n.trim().to_string(),
                    action: action.trim().to_string(),
                    at,
                }
            })
            .collect()
    })
}

/// The store's background flush interval in ms, when a test sets one.
pub fn store_flush_every_ms() -> Option<u64> {
    armed()
        .iter()
        .find(|a| a.name == "store:flush-every")
        .and_then(|a| a.action.parse().ok())
}

/// Passes, or fails the way the environment asks at this point.
pub fn hit(name: &str) -> std::io::Result<()> {
    debug_assert!(POINTS.contains(&name), "unknown failpoint {name}");
    let Some(armed) = armed().iter().find(|a| a.name == name) else {
        return Ok(());
    };
    if let Some(at) = armed.at {
        // Hits so far per armed point; only armed points are counted.
        static HITS: Mutex<Vec<(String, u64)>> = Mutex::new(Vec::new());
        let mut hits = HITS.lock().unwrap_or_else(|p| p.into_inner());
        let count = match hits.iter_mut().find(|(n, _)| n == name) {
            Some((_, c)) => {
                *c += 1;
                *c
            }
            None => {
                hits.push((name.to_string(), 1));
                1
            }
        };
        if count != at {
            return Ok(());
        }
    }
    match armed.action.as_str() {
        "abort" => {
            eprintln!("failpoint {name}: aborting");
            std::process::abort()
        }
        "enospc" => Err(std::io::Error::from_raw_os_error(28)),
        "eio" => Err(std::io::Error::from_raw_os_error(5)),
        _ => Ok(()),
    }
}
