//! The loop driven by hand: a real state dir and store, a fake clock, and
//! events handed in one by one instead of a watcher, a ticker or signals.
//! Only the training worker is a real thread; its `TrainingFinished` is
//! received from the channel like the real loop does.

use std::cell::Cell;
use std::fs;
use std::path::{Path, PathBuf};
use std::rc::Rc;
use std::sync::mpsc::{self, Receiver};
use std::time::Duration;

use chrono::{DateTime, Local, TimeDelta, Utc};

use super::event_loop::{Call, Clock, Daemon, Event, Flow, Reply};
use super::metrics::Shared;
use super::protocol::{Answer, DaemonStatus, Envelope, Request, VERSION};
use crate::config::Config;
use crate::ids::BatchId;
use crate::state::{self, StateDir};

#[derive(Clone)]
struct FakeClock(Rc<Cell<DateTime<Utc>>>);

impl FakeClock {
    fn advance(&self, ms: i64) {
        self.0.set(self.0.get() + TimeDelta::milliseconds(ms));
    }
}

impl Clock for FakeClock {
    fn now(&self) -> DateTime<Utc> {
        self.0.get()
    }
}

struct Rig {
    _dir: tempfile::TempDir,
    state: StateDir,
    clock: FakeClock,
    daemon: Daemon<FakeClock>,
    rx: Receiver<Event>,
    next_id: usize,
}

const SMALL: &str = include_str!("../../tests/data/small.toml");

/// Training settings that finish in well under a second on 100 rows, or
/// (`long`) that run until cancelled.
fn config_text(daemon: &str, long: bool) -> String {
    let training = if long {
        "[training]\ncold_epochs = 1000000\npatience = 0\nmax_seconds = 600.0\n"
    } else {
        "[training]\ncold_epochs = 5\n"
    };
    format!("{SMALL}\n[model]\nhidden = [4]\n\n{training}\n[daemon]\n{daemon}\n")
}

fn rig_at(daemon: &str, long: bool, start: DateTime<Utc>) -> Rig {
    let dir = tempfile::tempdir().unwrap();
    let state = StateDir::new(dir.path().join("state"));
    let text = config_text(daemon, long);
    let config = Config::parse(&text, Path::new("test.toml")).unwrap();
    let owner = state::create(&state, &config, &text, "tester").unwrap();
    let clock = FakeClock(Rc::new(Cell::new(start)));
    let (tx, rx) = mpsc::channel();
    let shared = Shared::new(DaemonStatus::default());
    let mut daemon = Daemon::new(owner, clock.clone(), tx, shared).unwrap();
    assert_eq!(daemon.step(Event::Rescan).unwrap(), Flow::Continue);
    Rig {
        _dir: dir,
        state,
        clock,
        daemon,
        rx,
        next_id: 0,
    }
}

fn rig(daemon: &str) -> Rig {
    rig_at(daemon, false, Utc::now())
}

impl Rig {
    /// Publishes a file of `rows` rows with fresh ids (so never a duplicate).
    fn publish(&mut self, name: &str, rows: usize) -> PathBuf {
        self.publish_warmer(name, rows, 0)
    }

    /// As `publish`, with every `temp` raised by `warmer`.
    fn publish_warmer(&mut self, name: &str, rows: usize, warmer: usize) -> PathBuf {
        let mut text = String::from("id,city,temp,flag,y\n");
        for _ in 0..rows {
            let id = self.next_id;
            self.next_id += 1;
            text.push_str(&format!(
                "{id},{},{}.5,x,{}\n",
                ["Oslo", "Lima"][id % 2],
                id % 30 + warmer,
                id % 7
            ));
        }
        let tmp = self.state.inbox().join(".tmp").join(name);
        fs::write(&tmp, text).unwrap();
        let dest = self.state.inbox().join(name);
        fs::rename(&tmp, &dest).unwrap();
        dest
    }

    fn step(&mut self, e: Event) -> Flow {
        self.daemon.step(e).unwrap()
    }

    fn tick_after(&mut self, ms: i64) -> Flow {
        self.clock.advance(ms);
        self.step(Event::Tick)
    }

    fn kinds(&self) -> Vec<String> {
        self.state
            .mirror()
            .entries()
            .unwrap()
            .iter()
            .map(|e| e.event.kind().to_string())
            .collect()
    }

    fn count(&self, kind: &str) -> usize {
        self.kinds().iter().filter(|k| *k == kind).count()
    }

    /// Waits for the worker to hand the owner back and lets the loop take it.
    fn finish_training(&mut self) -> Flow {
        let event = self
            .rx
            .recv_timeout(Duration::from_secs(120))
            .expect("the cycle ends");
        assert!(matches!(event, Event::TrainingFinished(_)));
        self.step(event)
    }
}

fn call(request: Request) -> (Call, Receiver<Answer>) {
    let (tx, rx) = mpsc::channel();
    let call = Call {
        envelope: Envelope {
            v: VERSION,
            user: "ana".into(),
            json: false,
            request,
        },
        reply: Reply::new(move |a| {
            let _ = tx.send(a);
        }),
    };
    (call, rx)
}

#[test]
fn a_file_written_in_place_is_taken_only_after_it_settled() {
    let mut r = rig("settle_seconds = 2.0\nmin_new_rows = 100000");
    let path = r.state.inbox().join("slow.csv");
    fs::write(&path, "id,city,temp,flag,y\n1,Oslo,3,x,1\n").unwrap();
    r.step(Event::InboxChanged);
    assert!(path.exists(), "taken at first sight");
    r.tick_after(1500);
    // The producer writes more: the wait starts again.
    let mut text = fs::read_to_string(&path).unwrap();
    text.push_str("2,Lima,4,x,2\n");
    fs::write(&path, &text).unwrap();
    r.step(Event::InboxChanged);
    r.tick_after(1500);
    assert!(
        path.exists(),
        "taken before it was stable for settle_seconds"
    );
    assert_eq!(r.count("batch-accepted"), 0);
    r.tick_after(600);
    assert!(!path.exists(), "a settled file stays in the inbox");
    assert_eq!(r.count("batch-accepted"), 1);
    assert_eq!(r.daemon.untrained_rows(), 2, "both rows, not a half file");
}

#[test]
fn a_directory_in_the_inbox_is_refused_and_logged_not_left_there() {
    let mut r = rig("settle_seconds = 0.0\nmin_new_rows = 100000");
    let dir = r.state.inbox().join("night-07");
    fs::create_dir(&dir).unwrap();
    fs::write(dir.join("rows.csv"), "id,city,temp,flag,y\n").unwrap();
    r.step(Event::InboxChanged);
    assert!(!dir.exists(), "the directory still sits in the inbox");
    assert!(
        r.state
            .refused()
            .join("night-07")
            .join("rows.csv")
            .is_file()
    );
    let refused: Vec<String> = r
        .state
        .mirror()
        .entries()
        .unwrap()
        .iter()
        .filter(|e| e.event.kind() == "batch-refused")
        .map(|e| e.event.summary())
        .collect();
    assert_eq!(refused.len(), 1, "{refused:?}");
    assert!(refused[0].contains("night-07"), "{refused:?}");
    // The publishing folder is never taken.
    assert!(r.state.inbox().join(".tmp").is_dir());
}

#[test]
fn the_timed_listing_finds_files_whose_events_were_lost() {
    let mut r = rig("settle_seconds = 0.0\nrescan_seconds = 60.0\nmin_new_rows = 100000");
    let path = r.publish("quiet.csv", 3);
    // No InboxChanged: the watcher missed it.
    r.tick_after(1000);
    assert!(path.exists());
    r.tick_after(59_500);
    assert!(!path.exists(), "the rescan timer did not list the inbox");
    assert_eq!(r.count("batch-accepted"), 1);
}

#[test]
fn a_burst_of_files_becomes_one_cycle_once_enough_rows_arrived() {
    let mut r = rig("settle_seconds = 1.0\nmin_new_rows = 100");
    r.publish("a.csv", 40);
    r.publish("b.csv", 40);
    r.step(Event::InboxChanged);
    r.tick_after(1000);
    assert_eq!(r.count("batch-accepted"), 2);
    assert_eq!(r.daemon.cycles_started, 0, "80 rows are below min_new_rows");
    r.publish("c.csv", 40);
    r.publish("d.csv", 40);
    r.publish("e.csv", 40);
    r.step(Event::InboxChanged);
    r.tick_after(400);
    r.step(Event::InboxChanged);
    r.tick_after(700);
    assert_eq!(
        r.count("batch-accepted"),
        5,
        "one step takes every ready file"
    );
    assert_eq!(
        r.daemon.cycles_started, 0,
        "a cycle started inside the burst"
    );
    r.tick_after(400);
    assert_eq!(r.daemon.cycles_started, 1);
    assert!(r.daemon.is_training());
    r.finish_training();
    assert_eq!(r.count("cycle-started"), 1);
    assert_eq!(r.daemon.untrained_rows(), 0);
    // Nothing new: no second cycle, however long it stays quiet.
    r.tick_after(5000);
    r.tick_after(5000);
    assert_eq!(r.daemon.cycles_started, 1);
}

#[test]
fn a_drifting_batch_starts_a_cycle_below_min_new_rows() {
    // Four ordinary files build the drift reference (3 past batches with
    // `min_batches = 3`); then a file whose `temp` lies wholly above the
    // stored rows is far outside what past batches showed, and is flagged.
    // The `id` column lies wholly above the stored one in every file: that
    // is usual for this stream and never flagged.
    let daemon = "settle_seconds = 1.0\nmin_new_rows = 1000\non_drift = \"hold\"\n\n[drift]\nmin_batches = 3";
    let mut r = rig(daemon);
    for name in ["a.csv", "b.csv", "c.csv", "d.csv"] {
        r.publish(name, 40);
        r.step(Event::InboxChanged);
        r.tick_after(1000);
        r.tick_after(1000);
    }
    assert_eq!(
        r.daemon.cycles_started, 0,
        "nothing is flagged while the reference is built, and ordinary files after"
    );
    r.publish_warmer("e.csv", 40, 30);
    r.step(Event::InboxChanged);
    r.tick_after(1000);
    r.tick_after(1000);
    assert_eq!(
        r.daemon.cycles_started, 1,
        "drift started a cycle below min_new_rows"
    );
    r.finish_training();
    assert_eq!(r.count("cycle-started"), 1, "{:?}", r.kinds());
    // With the default "none" the same files start nothing.
    let mut quiet = rig("settle_seconds = 1.0\nmin_new_rows = 1000\n\n[drift]\nmin_batches = 3");
    for (name, warmer) in [
        ("a.csv", 0),
        ("b.csv", 0),
        ("c.csv", 0),
        ("d.csv", 0),
        ("e.csv", 30),
    ] {
        quiet.publish_warmer(name, 40, warmer);
        quiet.step(Event::InboxChanged);
        quiet.tick_after(1000);
        quiet.tick_after(1000);
    }
    assert_eq!(quiet.count("batch-accepted"), 5);
    assert_eq!(quiet.daemon.cycles_started, 0);
}

#[test]
fn files_and_commands_arriving_during_training_wait_for_the_cycle() {
    let mut r = rig("settle_seconds = 0.0\nmin_new_rows = 10");
    r.publish("a.csv", 20);
    r.step(Event::InboxChanged);
    assert!(r.daemon.is_training());
    let late = r.publish("late.csv", 5);
    r.step(Event::InboxChanged);
    let (rollback, answer) = call(Request::Rollback {
        to: None,
        reason: "test".into(),
    });
    r.step(Event::Control(rollback));
    let (ping, pong) = call(Request::Ping);
    r.step(Event::Control(ping));
    let status = pong
        .try_recv()
        .expect("ping is answered at once")
        .status
        .unwrap();
    assert_eq!(status.activity, "training");
    assert_eq!(status.waiting_requests, 1);
    assert!(
        late.exists(),
        "a file was taken while the worker held the store"
    );
    assert!(
        answer.try_recv().is_err(),
        "a command ran while the worker held the store"
    );
    r.finish_training();
    let a = answer.try_recv().expect("answered once the cycle ended");
    assert!(a.note.unwrap().contains("waited for the daemon's cycle 1"));
    assert_eq!(r.daemon.waiting(), 0);
    r.tick_after(100);
    assert!(
        !late.exists(),
        "the file that waited was not taken after the cycle"
    );
    assert_eq!(r.count("batch-accepted"), 2);
}

#[test]
fn a_set_aside_during_training_runs_after_the_cycle_decided_and_before_the_next_one() {
    let mut r = rig("settle_seconds = 0.0\nmin_new_rows = 10");
    r.publish("a.csv", 20);
    r.step(Event::InboxChanged);
    assert!(r.daemon.is_training());
    // While cycle 1 trains on b000001: a new file, and the set-aside.
    r.publish("b.csv", 20);
    r.step(Event::InboxChanged);
    let (aside, answer) = call(Request::SetAside {
        batch: BatchId(1),
        reason: "export was broken".into(),
    });
    r.step(Event::Control(aside));
    assert!(
        answer.try_recv().is_err(),
        "the batch was set aside while the worker held the store"
    );
    assert_eq!(r.daemon.waiting(), 1);
    r.finish_training();
    let a = answer.try_recv().expect("answered once the cycle ended");
    assert_eq!(a.exit, 0, "{a:?}");
    assert_eq!(a.stdout, "b000001 set aside by hand: export was broken\n");
    assert!(
        a.note.unwrap().contains("waited for the daemon's cycle 1"),
        "the answer says why it waited"
    );
    // Cycle 1 decided on the rows in use when it began, before the entry
    // that set b000001 aside; b.csv was taken only after it.
    let kinds = r.kinds();
    let at = |kind: &str| kinds.iter().position(|k| k == kind);
    let aside_at = at("batch-set-aside").expect("logged");
    let decided_at = kinds
        .iter()
        .position(|k| {
            [
                "promoted",
                "shelved",
                "awaiting-approval",
                "cycle-abandoned",
            ]
            .contains(&k.as_str())
        })
        .expect("cycle 1 ended with a decision");
    assert!(decided_at < aside_at, "{kinds:?}");
    let second_batch_at = kinds.iter().rposition(|k| k == "batch-accepted").unwrap();
    assert!(aside_at < second_batch_at, "{kinds:?}");
    let entries = r.state.mirror().entries().unwrap();
    assert_eq!(entries[aside_at].user, "ana");
    // b.csv's 20 rows start cycle 2, which never reads b000001.
    assert!(r.daemon.is_training(), "{kinds:?}");
    r.finish_training();
    let holdout_b2 = entries
        .iter()
        .find_map(|e| match &e.event {
            crate::audit::Event::BatchAccepted {
                batch,
                holdout_rows,
                ..
            } if *batch == BatchId(2) => Some(*holdout_rows),
            _ => None,
        })
        .expect("b000002 accepted");
    let entries = r.state.mirror().entries().unwrap();
    let cycle2: Vec<usize> = entries
        .iter()
        .filter_map(|e| match &e.event {
            crate::audit::Event::CandidateTrained {
                cycle: 2,
                holdout_rows,
                ..
            } => Some(*holdout_rows),
            _ => None,
        })
        .collect();
    assert!(!cycle2.is_empty(), "cycle 2 trained no candidate");
    for rows in cycle2 {
        assert_eq!(rows as u64, holdout_b2, "cycle 2 scored b000001's rows");
    }
}

#[test]
fn the_daily_time_trains_rows_below_the_threshold() {
    let start = Utc::now();
    let at = (start + TimeDelta::minutes(30)).with_timezone(&Local);
    let daemon = format!(
        "settle_seconds = 0.0\nmin_new_rows = 100000\ntrain_at = \"{}\"",
        at.format("%H:%M")
    );
    let mut r = rig_at(&daemon, false, start);
    r.publish("a.csv", 8);
    r.step(Event::InboxChanged);
    r.tick_after(10 * 60 * 1000);
    assert_eq!(r.daemon.cycles_started, 0, "trained before the daily time");
    r.tick_after(21 * 60 * 1000);
    assert_eq!(
        r.daemon.cycles_started, 1,
        "the daily time passed with rows waiting"
    );
    r.finish_training();
    // The next day with nothing new: no cycle.
    r.tick_after(24 * 60 * 60 * 1000);
    assert_eq!(r.daemon.cycles_started, 1);
}

#[test]
fn shutdown_cancels_training_and_logs_the_cycle_as_abandoned() {
    let mut r = rig_at(
        "settle_seconds = 0.0\nmin_new_rows = 100000",
        true,
        Utc::now(),
    );
    r.publish("a.csv", 20);
    r.step(Event::InboxChanged);
    let (retrain, answer) = call(Request::Retrain {
        cold: false,
        dry_run: false,
    });
    r.step(Event::Control(retrain));
    assert!(r.daemon.is_training());
    let late = r.publish("late.csv", 3);
    assert_eq!(
        r.step(Event::Shutdown),
        Flow::Continue,
        "exited with a cycle running"
    );
    assert_eq!(r.finish_training(), Flow::Exit(crate::cli::Exit::Ok));
    let a = answer.try_recv().unwrap();
    assert!(a.error.unwrap().contains("cancelled"));
    let kinds = r.kinds();
    assert_eq!(
        kinds.last().map(String::as_str),
        Some("cycle-abandoned"),
        "{kinds:?}"
    );
    assert_eq!(r.count("candidate-trained"), 0);
    assert!(late.exists(), "a file was taken while stopping");
}

#[test]
fn a_link_in_the_inbox_is_set_aside_unread_and_the_loop_goes_on() {
    let mut r = rig("settle_seconds = 0.0\nmin_new_rows = 100000");
    let dangling = r.state.inbox().join("link.csv");
    std::os::unix::fs::symlink("/nonexistent/target.csv", &dangling).unwrap();
    let good = r.publish("good.csv", 3);
    r.step(Event::InboxChanged);
    assert!(!good.exists());
    // A link is refused (set aside with its reasons), never followed.
    assert!(fs::symlink_metadata(&dangling).is_err());
    assert_eq!(r.count("batch-refused"), 1);
    assert_eq!(r.count("batch-accepted"), 1);
}
