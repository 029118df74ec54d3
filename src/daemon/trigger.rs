//! When the daemon starts a retrain cycle: pure decisions over counts and
//! times, so they are tested without a store or a clock.
//!
//! A cycle starts when the rows no cycle has trained on reach
//! `min_new_rows`, or at the daily `train_at` time when any are waiting.
//! Either way only once the inbox is quiet (nothing ready, nothing
//! settling, no wake-up for `settle_seconds`), so a burst of files becomes
//! one cycle.

use chrono::{NaiveDateTime, NaiveTime, TimeDelta};

/// What started a cycle.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Why {
    /// Enough untrained rows.
    Rows,
    /// The daily training time passed with rows waiting.
    Daily,
    /// A `retrain` command.
    Asked,
    /// A batch drifted (`[daemon] on_drift`).
    Drift,
}

impl Why {
    pub fn words(self) -> &'static str {
        match self {
            Why::Rows => "enough new rows",
            Why::Daily => "daily training time",
            Why::Asked => "retrain command",
            Why::Drift => "a batch drifted",
        }
    }
}

/// What the trigger looks at.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Inputs {
    /// Accepted rows that no cycle has trained on.
    pub untrained_rows: u64,
    pub min_new_rows: u64,
    /// The daily time passed since it last fired, and not yet acted on.
    pub daily_due: bool,
    /// No file ready or settling, and no wake-up within the settle time.
    pub inbox_quiet: bool,
    /// The last cycle failed (or a candidate awaits approval) and no batch
    /// arrived since: trying again would fail the same way.
    pub blocked: bool,
    /// A batch accepted since the last cycle drifted.
    pub drift: bool,
}

/// Whether to start a cycle now, and why.
pub fn decide(i: Inputs) -> Option<Why> {
    if !i.inbox_quiet || i.blocked || i.untrained_rows == 0 {
        return None;
    }
    if i.untrained_rows >= i.min_new_rows.max(1) {
        Some(Why::Rows)
    } else if i.drift {
        Some(Why::Drift)
    } else if i.daily_due {
        Some(Why::Daily)
    } else {
        None
    }
}

/// Whether the daily time `at` (minutes after midnight) lies in
/// `(before, now]`, both local times. A clock that went back never fires.
pub fn passed(before: NaiveDateTime, now: NaiveDateTime, at: u32) -> bool {
    if now <= before {
        return false;
    }
    let Some(time) = NaiveTime::from_hms_opt(at / 60, at % 60, 0) else {
        return false;
    };
    let mut next = before.date().and_time(time);
    if next <= before {
        next += TimeDelta::days(1);
    }
    next <= now
}

#[cfg(test)]
mod tests {
    use super::*;

    fn inputs(rows: u64) -> Inputs {
        Inputs {
            untrained_rows: rows,
            min_new_rows: 100,
            daily_due: false,
            inbox_quiet: true,
            blocked: false,
            drift: false,
        }
    }

    fn t(s: &str) -> NaiveDateTime {
        NaiveDateTime::parse_from_str(s, "%Y-%m-%d %H:%M:%S").unwrap()
    }

    #[test]
    fn rows_reaching_the_threshold_start_a_cycle() {
        assert_eq!(decide(inputs(99)), None);
        assert_eq!(decide(inputs(100)), Some(Why::Rows));
        assert_eq!(decide(inputs(5000)), Some(Why::Rows));
    }

    #[test]
    fn nothing_starts_while_the_inbox_is_busy_or_after_a_failure() {
        let busy = Inputs {
            inbox_quiet: false,
            ..inputs(500)
        };
        assert_eq!(decide(busy), None);
        let blocked = Inputs {
            blocked: true,
            ..inputs(500)
        };
        assert_eq!(decide(blocked), None);
    }

    #[test]
    fn the_daily_time_trains_any_waiting_rows_but_not_none() {
        let due = Inputs {
            daily_due: true,
            ..inputs(3)
        };
        assert_eq!(decide(due), Some(Why::Daily));
        let nothing = Inputs {
            daily_due: true,
            ..inputs(0)
        };
        assert_eq!(decide(nothing), None);
    }

    #[test]
    fn a_drifting_batch_starts_a_cycle_below_the_threshold_when_quiet() {
        let drift = Inputs {
            drift: true,
            ..inputs(40)
        };
        assert_eq!(decide(drift), Some(Why::Drift));
        assert_eq!(
            decide(Inputs {
                inbox_quiet: false,
                ..drift
            }),
            None
        );
        assert_eq!(
            decide(Inputs {
                blocked: true,
                ..drift
            }),
            None
        );
        // Enough rows say so first.
        assert_eq!(
            decide(Inputs {
                drift: true,
                ..inputs(500)
            }),
            Some(Why::Rows)
        );
    }

    #[test]
    fn min_new_rows_of_zero_still_needs_a_row() {
        let zero = Inputs {
            min_new_rows: 0,
            ..inputs(0)
        };
        assert_eq!(decide(zero), None);
        let one = Inputs {
            min_new_rows: 0,
            ..inputs(1)
        };
        assert_eq!(decide(one), Some(Why::Rows));
    }

    #[test]
    fn the_daily_time_is_passed_once_per_day() {
        let at = 2 * 60 + 30;
        assert!(!passed(
            t("2026-12-01 02:00:00"),
            t("2026-12-01 02:29:59"),
            at
        ));
        assert!(passed(
            t("2026-12-01 02:29:59"),
            t("2026-12-01 02:30:00"),
            at
        ));
        assert!(!passed(
            t("2026-12-01 02:30:00"),
            t("2026-12-01 02:30:01"),
            at
        ));
        // Across midnight, and a daemon that slept through the time.
        assert!(passed(
            t("2026-12-01 23:00:00"),
            t("2026-12-02 03:00:00"),
            at
        ));
        assert!(passed(
            t("2026-12-01 03:00:00"),
            t("2026-12-03 01:00:00"),
            at
        ));
        // A clock that went back never fires.
        assert!(!passed(
            t("2026-12-01 02:31:00"),
            t("2026-12-01 02:20:00"),
            at
        ));
    }
}
