//! The daemon's loop: one thread that owns the state dir and reacts to one
//! event at a time. Everything outside (the inbox watcher, the clock, the
//! control socket, signals, the training worker) reaches it as an `Event`,
//! so tests drive it by handing it events and a fake clock.
//!
//! Training runs on a worker thread that takes the `Owner` with it for the
//! length of the cycle. Meanwhile the loop keeps answering `ping` (from
//! published state), keeps watching the inbox, and queues commands that
//! change state; they run, in order, as soon as the owner comes back.

use std::collections::{HashMap, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::Sender;
use std::time::Instant;

use chrono::{DateTime, Local, NaiveDateTime, TimeDelta, Utc};

use super::inbox::{self, Settler, Signature};
use super::metrics::Shared;
use super::protocol::{Answer, DaemonStatus, Envelope, Request};
use super::trigger::{self, Why};
use crate::aside::AsideError;
use crate::cli::{self, Exit};
use crate::config::Config;
use crate::cycle::{self, CycleError, ModelRecord};
use crate::ids::{BatchId, ModelId};
use crate::intake::{self, Outcome, Source};
use crate::lifecycle::{self, DecisionError};
use crate::state::{self, Owner, StateError};
use crate::store::BatchRecord;
use crate::train::{Progress, TrainError};

/// Something the loop reacts to.
pub enum Event {
    /// The watcher saw a change in the inbox (a wake-up; its paths are not trusted).
    InboxChanged,
    /// List the inbox now: the watcher overflowed or failed.
    Rescan,
    /// Time passed: settling files, the rescan timer, the daily time.
    Tick,
    /// A settled inbox file to take (the loop queues these itself).
    FileReady(PathBuf),
    /// A command from the control socket.
    Control(Call),
    /// The worker finished a cycle and hands the owner back.
    TrainingFinished(Box<Finished>),
    /// SIGTERM or SIGINT: stop taking files, cancel training, exit.
    Shutdown,
}

/// A command and where its answer goes.
pub struct Call {
    pub envelope: Envelope,
    pub reply: Reply,
}

/// Sends one answer back to whoever asked.
pub struct Reply(Box<dyn FnOnce(Answer) + Send>);

impl Reply {
    pub fn new(f: impl FnOnce(Answer) + Send + 'static) -> Reply {
        Reply(Box::new(f))
    }
    pub fn send(self, answer: Answer) {
        (self.0)(answer)
    }
}

/// What the worker hands back.
pub struct Finished {
    owner: Owner,
    /// `Err` when the worker panicked.
    result: Result<Result<cycle::Outcome, CycleError>, String>,
}

/// The daemon's idea of the time (injected so tests need no sleeps).
pub trait Clock {
    fn now(&self) -> DateTime<Utc>;
}

/// The real clock.
pub struct SystemClock;

impl Clock for SystemClock {
    fn now(&self) -> DateTime<Utc> {
        Utc::now()
    }
}

/// Whether the loop goes on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Flow {
    Continue,
    Exit(Exit),
}

/// A cycle on the worker.
struct Running {
    why: Why,
    cycle: Option<u64>,
    started: Instant,
    started_at: DateTime<Utc>,
    cancel: Arc<AtomicBool>,
    reply: Option<(Reply, bool)>,
    dry_run: bool,
}

/// The loop's state.
pub struct Daemon<C: Clock> {
    owner: Option<Owner>,
    clock: C,
    inbox: PathBuf,
    settle: TimeDelta,
    rescan_every: TimeDelta,
    min_new_rows: u64,
    train_at: Option<u32>,
    settler: Settler,
    ready: VecDeque<PathBuf>,
    /// Inbox files that could not be read, with the version that failed.
    stuck: HashMap<PathBuf, Signature>,
    waiting: VecDeque<Call>,
    running: Option<Running>,
    events: Sender<Event>,
    stopping: bool,
    dirty: bool,
    last_wake: DateTime<Utc>,
    next_rescan: DateTime<Utc>,
    last_local: NaiveDateTime,
    daily_due: bool,
    untrained_rows: u64,
    /// A batch since the last cycle drifted (see `[daemon] on_drift`).
    drift_pending: bool,
    /// Batch count when a cycle last failed: no automatic retry until more arrive.
    blocked_at: Option<u64>,
    shared: Shared,
    /// The prediction endpoint's model, kept on the serving model.
    endpoint: Option<crate::endpoint::Follower>,
    user: String,
    /// Cycles started by this loop (automatic and asked for).
    pub cycles_started: u64,
}

/// The inbox of a state dir: `[daemon] inbox` (relative to the state dir)
/// or `<state>/inbox`.
pub fn inbox_of(owner_state: &state::StateDir, config: &Config) -> PathBuf {
    match &config.daemon.inbox {
        Some(p) => owner_state.root().join(p),
        None => owner_state.inbox(),
    }
}

impl<C: Clock> Daemon<C> {
    /// A loop over an opened state dir. `events` is where the worker sends
    /// `TrainingFinished`; the caller feeds the loop from its receiver.
    pub fn new(
        owner: Owner,
        clock: C,
        events: Sender<Event>,
        shared: Shared,
    ) -> anyhow::Result<Daemon<C>> {
        let d = &owner.config.daemon;
        let inbox = inbox_of(&owner.state, &owner.config);
        if !inbox.is_dir() {
            anyhow::bail!(
                "inbox {} is not a folder; create it or set [daemon] inbox in the config",
                inbox.display()
            );
        }
        let now = clock.now();
        let seconds = |s: f64| TimeDelta::milliseconds((s * 1000.0).round() as i64);
        let mut daemon = Daemon {
            clock,
            settle: seconds(d.settle_seconds),
            rescan_every: seconds(d.rescan_seconds),
            min_new_rows: d.min_new_rows as u64,
            train_at: d.train_at.as_deref().and_then(crate::config::parse_hh_mm),
            settler: Settler::new(d.settle_seconds),
            inbox,
            owner: Some(owner),
            ready: VecDeque::new(),
            stuck: HashMap::new(),
            waiting: VecDeque::new(),
            running: None,
            events,
            stopping: false,
            dirty: true,
            last_wake: now,
            next_rescan: now,
            last_local: now.with_timezone(&Local).naive_local(),
            daily_due: false,
            untrained_rows: 0,
            drift_pending: false,
            blocked_at: None,
            shared,
            endpoint: None,
            user: state::current_user(),
            cycles_started: 0,
        };
        daemon.refresh()?;
        Ok(daemon)
    }

    pub fn inbox(&self) -> &Path {
        &self.inbox
    }

    /// Keeps the prediction endpoint's model on the serving model from now
    /// on (loaded at once, then swapped each time the audit log moves the
    /// serving pointer).
    pub fn serve_predictions(&mut self, mut follower: crate::endpoint::Follower) {
        follower.follow(self.shared.lock().counters.serving);
        self.endpoint = Some(follower);
    }

    /// Rows accepted that no cycle has trained on.
    pub fn untrained_rows(&self) -> u64 {
        self.untrained_rows
    }

    pub fn is_training(&self) -> bool {
        self.running.is_some()
    }

    /// Commands waiting for the running cycle to end.
    pub fn waiting(&self) -> usize {
        self.waiting.len()
    }

    /// How long the caller may wait for the next event before a `Tick`.
    pub fn tick_every(&self) -> std::time::Duration {
        if self.settler.tracked() > self.stuck.len() || self.dirty {
            std::time::Duration::from_millis(100)
        } else {
            std::time::Duration::from_millis(500)
        }
    }

    /// Handles one event, then the files it made ready, then whatever is
    /// due (a listing, a cycle); publishes the state.
    pub fn step(&mut self, event: Event) -> anyhow::Result<Flow> {
        let mut flow = self.handle(event)?;
        while flow == Flow::Continue {
            if self.dirty {
                self.scan();
            }
            let next = match self.owner {
                Some(_) if !self.stopping => self.ready.pop_front(),
                _ => None,
            };
            match next {
                Some(path) => flow = self.handle(Event::FileReady(path))?,
                None => break,
            }
        }
        if flow == Flow::Continue {
            self.maybe_train()?;
        }
        self.publish();
        Ok(flow)
    }

    fn handle(&mut self, event: Event) -> anyhow::Result<Flow> {
        let now = self.clock.now();
        match event {
            Event::InboxChanged | Event::Rescan => {
                self.dirty = true;
                self.last_wake = now;
            }
            Event::Tick => {
                let local = now.with_timezone(&Local).naive_local();
                if let Some(at) = self.train_at
                    && trigger::passed(self.last_local, local, at)
                {
                    self.daily_due = true;
                }
                self.last_local = local;
                if now >= self.next_rescan {
                    self.dirty = true;
                }
                // Files seen but not taken yet: look again whether they settled.
                if self.settler.tracked() > self.stuck.len() {
                    self.dirty = true;
                }
            }
            Event::FileReady(path) => self.take(&path)?,
            Event::Control(call) => return self.control(call),
            Event::TrainingFinished(finished) => return self.finished(*finished),
            Event::Shutdown => return Ok(self.shutdown()),
        }
        Ok(Flow::Continue)
    }

    /// Lists the inbox and queues the files that settled.
    fn scan(&mut self) {
        self.dirty = false;
        if self.stopping {
            return;
        }
        let now = self.clock.now();
        self.next_rescan = now + self.rescan_every;
        let listing = match inbox::list(&self.inbox) {
            Ok(l) => l,
            Err(e) => {
                tracing::warn!("cannot list inbox {}: {e}", self.inbox.display());
                return;
            }
        };
        let settled = self.settler.observe(&listing, now);
        self.stuck
            .retain(|p, sig| listing.iter().any(|(q, s)| q == p && s == sig));
        if self.owner.is_none() {
            // Taken after the cycle: the listing then is the one that counts.
            return;
        }
        for path in settled {
            if !self.stuck.contains_key(&path) && !self.ready.contains(&path) {
                self.ready.push_back(path);
            }
        }
    }

    /// Takes one inbox file through intake.
    fn take(&mut self, path: &Path) -> anyhow::Result<()> {
        let Some(owner) = self.owner.as_mut() else {
            self.dirty = true;
            return Ok(());
        };
        let Ok(meta) = std::fs::symlink_metadata(path) else {
            // Gone (its producer took it back): nothing to do.
            self.settler.forget(path);
            return Ok(());
        };
        let signature = Signature::of(&meta);
        let outcome = intake::take_file(owner, path, Source::Inbox, &self.user, self.clock.now());
        let shown = path.display();
        match outcome {
            Ok(Outcome::Accepted { batch, entry }) => {
                tracing::info!(
                    "{shown}: accepted as batch {} ({} rows)",
                    batch.id,
                    batch.rows()
                );
                if !batch.is_set_aside() {
                    self.untrained_rows += batch.rows();
                }
                let shifted = after_accept(owner, &batch, &self.user)?;
                let flagged = match &entry.event {
                    crate::audit::Event::BatchAccepted { drift: Some(d), .. } => {
                        d.flagged().iter().map(|c| c.to_string()).collect()
                    }
                    _ => Vec::new(),
                };
                if batch.is_set_aside() {
                    tracing::warn!(
                        "batch {}: suspect, set aside: {}",
                        batch.id,
                        batch.set_aside.as_ref().map_or("", |a| a.reason.as_str())
                    );
                } else if shifted || !flagged.is_empty() {
                    tracing::info!(
                        "batch {}: drift ({}); on_drift = {}",
                        batch.id,
                        if flagged.is_empty() {
                            "the serving model's loss rose".to_string()
                        } else {
                            flagged.join(", ")
                        },
                        owner.config.daemon.on_drift.name()
                    );
                    self.drift_pending = true;
                }
            }
            Ok(Outcome::Duplicate { of, .. }) => {
                tracing::info!("{shown}: duplicate of batch {of}; set aside in the archive")
            }
            Ok(Outcome::Completed { batch }) => {
                tracing::info!("{shown}: already stored as batch {batch}; archiving finished")
            }
            Ok(Outcome::Refused {
                refusal, kept_as, ..
            }) => tracing::warn!(
                "{shown}: refused, nothing stored ({} problem(s)): {}{}",
                refusal.total,
                refusal.first(),
                kept_as.map_or_else(String::new, |p| format!(
                    "; all problems in {}.why.json",
                    p.display()
                ))
            ),
            Ok(Outcome::NotReady { reason }) => {
                tracing::info!("{shown}: not taken yet: {reason}");
                return Ok(());
            }
            Err(StateError::Io { path: p, source }) if p == path => {
                // The file's own problem (unreadable, vanished): it stays in
                // the inbox and is tried again once it changes.
                tracing::warn!(
                    "{shown}: cannot be taken: {source}; it stays in the inbox until it changes"
                );
                self.stuck.insert(path.to_path_buf(), signature);
                // It may have failed after its batch was stored (removing
                // it from the inbox): that batch's check runs now.
                crate::fresh::run_missing(owner, &self.user)?;
                return Ok(());
            }
            Err(e) => return Err(e.into()),
        }
        self.settler.forget(path);
        self.fold_audit()?;
        Ok(())
    }

    fn control(&mut self, call: Call) -> anyhow::Result<Flow> {
        if call.envelope.request == Request::Ping {
            let status = self.status();
            call.reply.send(Answer {
                status: Some(status),
                ..Answer::default()
            });
            return Ok(Flow::Continue);
        }
        if self.stopping {
            call.reply.send(Answer::failed(
                Exit::Busy as u8,
                "the daemon is stopping; nothing was done. Run the command again once it has stopped (it then runs directly)",
            ));
            return Ok(Flow::Continue);
        }
        if self.owner.is_none() {
            // The worker holds the owner: run it when the cycle ends, and say so.
            let cycle = self.running.as_ref().and_then(|r| r.cycle);
            let note = match cycle {
                Some(c) => format!("waited for the daemon's cycle {c} to end"),
                None => "waited for the daemon's running cycle to end".to_string(),
            };
            tracing::info!(
                "{} from {} {note}",
                call.envelope.request.name(),
                call.envelope.user
            );
            let Call { envelope, reply } = call;
            let reply = Reply::new(move |mut answer: Answer| {
                answer.note.get_or_insert(note);
                reply.send(answer);
            });
            self.waiting.push_back(Call { envelope, reply });
            return Ok(Flow::Continue);
        }
        self.execute(call)?;
        Ok(Flow::Continue)
    }

    /// Runs a state-changing command now (the owner is here).
    fn execute(&mut self, call: Call) -> anyhow::Result<()> {
        let Call { envelope, reply } = call;
        let Envelope {
            user,
            json,
            request,
            ..
        } = envelope;
        let Some(owner) = self.owner.as_mut() else {
            self.waiting.push_front(Call {
                envelope: Envelope {
                    v: super::protocol::VERSION,
                    user,
                    json,
                    request,
                },
                reply,
            });
            return Ok(());
        };
        let mut fatal = None;
        let answer = match request {
            Request::Ping => Answer::default(),
            Request::Ingest { cwd, files } => {
                match cli::ingest_files(owner, Some(&cwd), &files, json, &user) {
                    Ok(taken) => Answer {
                        exit: taken.exit as u8,
                        stdout: taken.stdout,
                        error: taken.error,
                        ..Answer::default()
                    },
                    Err(e) => {
                        let named: Vec<PathBuf> = files.iter().map(|f| cwd.join(f)).collect();
                        let files_fault = e.chain().any(|c| {
                            matches!(c.downcast_ref::<StateError>(),
                                Some(StateError::Io { path, .. }) if named.contains(path))
                        });
                        let answer = Answer::failed(cli::exit_for(&e) as u8, cli::error_text(&e));
                        if !files_fault {
                            fatal = Some(e);
                        }
                        answer
                    }
                }
            }
            Request::Retrain { cold, dry_run } => {
                let options = cycle::Options {
                    force_cold: cold,
                    dry_run,
                    hold: false,
                };
                self.start_cycle(Why::Asked, options, Some((reply, json)), &user)?;
                self.blocked_at = None;
                return Ok(());
            }
            Request::Rollback { to, reason } => decide(
                lifecycle::rollback(owner, to, &reason, &user),
                json,
                &mut fatal,
            ),
            Request::Approve { model, reason } => decide(
                lifecycle::approve(owner, model, &reason, &user),
                json,
                &mut fatal,
            ),
            Request::Backup { out } => match crate::backup::backup(owner, &out, &user) {
                Ok(m) => match cli::render_backup(&m, &out, json) {
                    Ok(stdout) => Answer {
                        stdout,
                        ..Answer::default()
                    },
                    Err(e) => Answer::failed(Exit::Failure as u8, format!("{e:#}")),
                },
                Err(e) => {
                    // The destination's problems are the command's; the
                    // store's are the machine's.
                    let machine = match &e {
                        crate::backup::BackupError::Refused { .. }
                        | crate::backup::BackupError::Verify(_) => false,
                        crate::backup::BackupError::Io { path, .. } => !path.starts_with(&out),
                        _ => true,
                    };
                    let e = anyhow::Error::from(e);
                    let answer = Answer::failed(cli::exit_for(&e) as u8, cli::error_text(&e));
                    if machine {
                        fatal = Some(e);
                    }
                    answer
                }
            },
            Request::Verify => match crate::verify::check(owner) {
                Ok(result) => {
                    let (stdout, exit) = cli::render_verify(&result, json);
                    Answer {
                        exit: exit as u8,
                        stdout,
                        error: cli::verify_error(&result),
                        ..Answer::default()
                    }
                }
                Err(e) => {
                    let e = anyhow::Error::from(e);
                    let answer = Answer::failed(cli::exit_for(&e) as u8, cli::error_text(&e));
                    fatal = Some(e);
                    answer
                }
            },
            Request::Decline { model, reason } => decide(
                lifecycle::decline(owner, model, &reason, &user),
                json,
                &mut fatal,
            ),
            // Here, not on the worker: a cycle that was running when this
            // arrived has ended and decided (on the rows in use when it
            // began), and the next cycle, started from this loop after the
            // queue is empty, reads the batch's new state. A candidate of
            // the ended cycle left waiting for approval is refused by
            // `approve` while it saw a batch set aside.
            Request::SetAside { batch, reason } => set_aside_answer(
                crate::aside::change(owner, batch, true, &reason, &user),
                json,
                &mut fatal,
            ),
            Request::BringBack { batch, reason } => set_aside_answer(
                crate::aside::change(owner, batch, false, &reason, &user),
                json,
                &mut fatal,
            ),
        };
        // The prediction endpoint follows a rollback or approval before the
        // command answers, so a client that rolled back is answered by the
        // model it rolled back to from then on.
        let folded = self.fold_audit();
        reply.send(answer);
        folded?;
        // A command may have added rows or settled a waiting candidate.
        self.blocked_at = None;
        self.refresh()?;
        match fatal {
            Some(e) => Err(e),
            None => Ok(()),
        }
    }

    /// Starts a cycle if one is due.
    fn maybe_train(&mut self) -> anyhow::Result<()> {
        let Some(owner) = &self.owner else {
            return Ok(());
        };
        if self.stopping || !self.ready.is_empty() {
            return Ok(());
        }
        let now = self.clock.now();
        let batches = owner.store.totals().batches;
        if self.daily_due && self.untrained_rows == 0 {
            self.daily_due = false;
        }
        let inputs = trigger::Inputs {
            untrained_rows: self.untrained_rows,
            min_new_rows: self.min_new_rows,
            daily_due: self.daily_due,
            inbox_quiet: self.settler.settling(now) == 0 && now - self.last_wake >= self.settle,
            blocked: self.blocked_at.is_some_and(|b| batches <= b),
            drift: self.drift_pending
                && owner.config.daemon.on_drift != crate::config::DriftAction::None,
        };
        if let Some(why) = trigger::decide(inputs) {
            self.daily_due = false;
            let mut options = cycle::Options::default();
            if self.drift_pending {
                match owner.config.daemon.on_drift {
                    crate::config::DriftAction::None | crate::config::DriftAction::Train => {}
                    crate::config::DriftAction::Hold => options.hold = true,
                    crate::config::DriftAction::Cold => options.force_cold = true,
                }
            }
            self.drift_pending = false;
            let user = self.user.clone();
            self.start_cycle(why, options, None, &user)?;
        }
        Ok(())
    }

    /// Hands the owner to a worker thread that runs one cycle.
    fn start_cycle(
        &mut self,
        why: Why,
        options: cycle::Options,
        reply: Option<(Reply, bool)>,
        user: &str,
    ) -> anyhow::Result<()> {
        let Some(mut owner) = self.owner.take() else {
            anyhow::bail!("a cycle was started while another runs");
        };
        let next_cycle = owner.store.cycles()? + 1;
        let cancel = Arc::new(AtomicBool::new(false));
        let started_at = self.clock.now();
        tracing::info!(
            "cycle {next_cycle} starts ({}; {} untrained rows)",
            why.words(),
            self.untrained_rows
        );
        self.running = Some(Running {
            why,
            cycle: (!options.dry_run).then_some(next_cycle),
            started: Instant::now(),
            started_at,
            cancel: cancel.clone(),
            reply,
            dry_run: options.dry_run,
        });
        self.cycles_started += 1;
        let events = self.events.clone();
        let shared = self.shared.clone();
        let user = user.to_string();
        std::thread::Builder::new()
            .name("cycle".into())
            .spawn(move || {
                let progress = |p: Progress| {
                    let words = format!(
                        "{} candidate: epoch {}/{}, mini-batch {}/{}",
                        cycle::run_name(p.kind),
                        p.epoch,
                        p.max_epochs,
                        p.batch,
                        p.batches
                    );
                    shared.lock().status.progress = Some(words);
                };
                let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    cycle::run(&mut owner, options, &user, Some(&progress), Some(&cancel))
                }))
                .map_err(|panic| {
                    panic
                        .downcast_ref::<&str>()
                        .map(|s| s.to_string())
                        .or_else(|| panic.downcast_ref::<String>().cloned())
                        .unwrap_or_else(|| "unknown panic".into())
                });
                let _ = events.send(Event::TrainingFinished(Box::new(Finished {
                    owner,
                    result,
                })));
            })?;
        Ok(())
    }

    /// The owner is back: answer, record, then run what waited.
    fn finished(&mut self, finished: Finished) -> anyhow::Result<Flow> {
        let Finished { mut owner, result } = finished;
        let running = self.running.take();
        let seconds = running
            .as_ref()
            .map_or(0.0, |r| r.started.elapsed().as_secs_f64());
        let mut fatal = None;
        let json = running
            .as_ref()
            .is_some_and(|r| r.reply.as_ref().is_some_and(|(_, j)| *j));
        let answer = match result {
            Err(panic) => {
                let e = anyhow::anyhow!("the training thread failed: {panic}");
                let answer = Answer::failed(Exit::Failure as u8, e.to_string());
                fatal = Some(e);
                answer
            }
            Ok(Ok(outcome)) => {
                match &outcome {
                    cycle::Outcome::NothingNew { serving } => {
                        tracing::info!("nothing new to train on; {serving} serves")
                    }
                    cycle::Outcome::Decided(r) => tracing::info!(
                        "cycle {} ended after {seconds:.1} s: {} — {}",
                        r.cycle,
                        r.decision.kind(),
                        r.decision.reason()
                    ),
                }
                if !running.as_ref().is_some_and(|r| r.dry_run) {
                    let mut p = self.shared.lock();
                    p.cycles.count += 1;
                    p.cycles.sum_seconds += seconds;
                    p.cycles.last_seconds = Some(seconds);
                }
                Answer {
                    stdout: cli::render_cycle(outcome, json),
                    ..Answer::default()
                }
            }
            Ok(Err(e)) => {
                let cancelled = matches!(e, CycleError::Train(TrainError::Cancelled));
                let machine = matches!(
                    e,
                    CycleError::State(_) | CycleError::Store(_) | CycleError::Audit(_)
                );
                if !machine {
                    // Cut short or failed: it changed nothing; say so now
                    // rather than at the next start.
                    let user = self.user.clone();
                    if let Some(c) =
                        state::close_open_cycle(&mut owner.store, &owner.mirror, &user)?
                    {
                        tracing::warn!("cycle {c} recorded as abandoned: {e}");
                    }
                }
                if !cancelled && !machine {
                    tracing::warn!(
                        "cycle failed: {e}; no new cycle starts until more data arrives"
                    );
                    self.blocked_at = Some(owner.store.totals().batches);
                }
                let e = anyhow::Error::from(e);
                let answer = Answer::failed(cli::exit_for(&e) as u8, cli::error_text(&e));
                if machine {
                    fatal = Some(e);
                }
                answer
            }
        };
        self.owner = Some(owner);
        // The prediction endpoint moves to a promoted model before `retrain`
        // answers, so a client that waited for the command is answered by
        // the model it promoted.
        let folded = self.fold_audit();
        if let Some((reply, _)) = running.and_then(|r| r.reply) {
            reply.send(answer);
        }
        folded?;
        self.shared.lock().status.progress = None;
        self.refresh()?;
        if let Some(e) = fatal {
            return Err(e);
        }
        if self.stopping {
            return Ok(Flow::Exit(Exit::Ok));
        }
        self.dirty = true;
        while self.owner.is_some()
            && let Some(call) = self.waiting.pop_front()
        {
            self.execute(call)?;
        }
        Ok(Flow::Continue)
    }

    fn shutdown(&mut self) -> Flow {
        if !self.stopping {
            tracing::info!("stopping: no more files are taken");
        }
        self.stopping = true;
        for call in self.waiting.drain(..) {
            call.reply.send(Answer::failed(
                Exit::Busy as u8,
                "the daemon stopped before running this; nothing was done. Run the command again",
            ));
        }
        match &self.running {
            Some(r) => {
                tracing::info!("cancelling the running cycle; its candidate is discarded");
                r.cancel.store(true, Ordering::SeqCst);
                Flow::Continue
            }
            None => Flow::Exit(Exit::Ok),
        }
    }

    /// Recomputes what depends on the store: untrained rows and counters.
    fn refresh(&mut self) -> anyhow::Result<()> {
        if let Some(owner) = &self.owner {
            self.untrained_rows = untrained_rows(owner)?;
        }
        self.fold_audit()
    }

    /// Folds audit entries not seen yet into the published counters.
    fn fold_audit(&mut self) -> anyhow::Result<()> {
        let Some(owner) = &self.owner else {
            return Ok(());
        };
        let after = self.shared.lock().counters.last_seq;
        let fresh = owner.store.audit_after(after)?;
        let serving = {
            let mut p = self.shared.lock();
            for (_, bytes) in fresh {
                match crate::audit::Entry::from_line(&bytes) {
                    Ok(e) => p.counters.fold(&e),
                    Err(e) => tracing::warn!("audit entry not readable for metrics: {e}"),
                }
            }
            p.counters.serving
        };
        // Outside the lock: loading a model must not hold up `ping`.
        if let Some(endpoint) = &mut self.endpoint {
            endpoint.follow(serving);
        }
        Ok(())
    }

    fn status(&self) -> DaemonStatus {
        let mut s = self.shared.status();
        self.fill(&mut s);
        s
    }

    fn fill(&self, s: &mut DaemonStatus) {
        s.activity = if self.stopping {
            "stopping"
        } else if self.running.is_some() {
            "training"
        } else {
            "idle"
        }
        .into();
        s.cycle = self.running.as_ref().and_then(|r| r.cycle);
        s.cycle_reason = self.running.as_ref().map(|r| r.why.words().to_string());
        s.cycle_started_at = self.running.as_ref().map(|r| {
            r.started_at
                .to_rfc3339_opts(chrono::SecondsFormat::Secs, true)
        });
        s.untrained_rows = self.untrained_rows;
        s.min_new_rows = self.min_new_rows;
        s.waiting_requests = self.waiting.len();
        s.inbox_files = self.settler.tracked();
        s.inbox = self.inbox.clone();
    }

    /// Makes the current state visible to `ping` and the metrics endpoint.
    pub fn publish(&self) {
        let mut p = self.shared.lock();
        self.fill(&mut p.status);
        p.heartbeat = Instant::now();
    }
}

fn decide(
    result: Result<crate::audit::Entry, DecisionError>,
    json: bool,
    fatal: &mut Option<anyhow::Error>,
) -> Answer {
    let machine = |e: &DecisionError| {
        matches!(
            e,
            DecisionError::Store(_) | DecisionError::State(_) | DecisionError::Audit(_)
        )
    };
    entry_answer(result, machine, json, fatal)
}

fn set_aside_answer(
    result: Result<crate::audit::Entry, AsideError>,
    json: bool,
    fatal: &mut Option<anyhow::Error>,
) -> Answer {
    let machine = |e: &AsideError| matches!(e, AsideError::Store(_) | AsideError::Audit(_));
    entry_answer(result, machine, json, fatal)
}

/// The answer to a command recorded as one audit entry, printed as the
/// command prints it when run directly. A failure of the store or the log
/// (`machine`) also ends the daemon, as it ends a direct command; the
/// command's own refusals (no such batch, no reason) are only answered.
fn entry_answer<E>(
    result: Result<crate::audit::Entry, E>,
    machine: impl Fn(&E) -> bool,
    json: bool,
    fatal: &mut Option<anyhow::Error>,
) -> Answer
where
    E: std::error::Error + Send + Sync + 'static,
{
    match result {
        Ok(entry) => Answer {
            stdout: cli::render_decision(&entry, json),
            ..Answer::default()
        },
        Err(e) => {
            let is_machine = machine(&e);
            let e = anyhow::Error::from(e);
            let answer = Answer::failed(cli::exit_for(&e) as u8, cli::error_text(&e));
            if is_machine {
                *fatal = Some(e);
            }
            answer
        }
    }
}

/// Accepted rows in batches after the last one any cycle trained through,
/// less those of batches set aside.
pub fn untrained_rows(owner: &Owner) -> anyhow::Result<u64> {
    let next = owner.store.next_model_id()?;
    let mut through = BatchId(0);
    if next.0 > 1 {
        let latest = ModelId(next.0 - 1);
        if let Some(bytes) = owner.store.meta_value(&cycle::model_key(latest))? {
            let record: ModelRecord = serde_json::from_slice(&bytes).map_err(|e| {
                anyhow::anyhow!(
                    "store {}: record of {latest} is unreadable ({e}); run `tidegate verify`",
                    owner.store.path().display()
                )
            })?;
            through = record.trained_through;
        }
    }
    Ok(owner
        .store
        .batches()?
        .iter()
        .filter(|b| b.id > through && !b.is_set_aside())
        .map(BatchRecord::rows)
        .sum())
}

/// Runs after each batch the daemon accepts from the inbox: the fresh-data
/// check (serving model against the one it replaced, on the new rows; it
/// may roll back). The batch is stored whatever the check finds; a check
/// whose models cannot be scored is reported, as with `ingest`, and a
/// failure to write its entry or rollback stops the daemon (the next start
/// runs the check again).
/// Returns whether the check saw the serving model's loss rise on the
/// batch (a shift the per-column drift statistics may not see).
pub fn after_accept(
    owner: &mut Owner,
    batch: &BatchRecord,
    user: &str,
) -> Result<bool, crate::fresh::FreshError> {
    match crate::fresh::check_batch(owner, batch.id, user) {
        Ok(Some(found)) => {
            tracing::info!("batch {}: fresh-data check: {}", batch.id, found.verdict());
            if let Some(r) = &found.rollback {
                tracing::warn!("batch {}: {}", batch.id, r.event.summary());
            }
            Ok(found.verdict() == "shifted")
        }
        Ok(None) => Ok(false),
        Err(e) if e.is_fatal() => Err(e),
        Err(e) => {
            tracing::warn!(
                "batch {}: the fresh-data check could not run: {e}",
                batch.id
            );
            Ok(false)
        }
    }
}
