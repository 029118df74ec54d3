//! What the daemon publishes for others to read without waiting for its
//! loop: the status answered to `ping`, counters folded from the audit log,
//! and an optional loopback HTTP endpoint with `/health` and `/metrics`
//! (OpenMetrics 1.0 text format: counts that only grow are counters whose
//! samples end in `_total`, levels are gauges, and the text ends in `# EOF`).

use std::collections::HashMap;
use std::io::{BufRead, BufReader, Write};
use std::net::{SocketAddr, TcpListener, TcpStream};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use chrono::{DateTime, Utc};

use super::protocol::DaemonStatus;
use crate::audit::{Entry, Event};
use crate::ids::{AuditSeq, ModelId};

/// Totals folded from the audit log, entry by entry.
#[derive(Debug, Clone, PartialEq)]
pub struct Counters {
    pub last_seq: AuditSeq,
    pub batches: u64,
    pub rows: u64,
    pub refused_files: u64,
    pub duplicate_files: u64,
    pub cycles_started: u64,
    pub cycles_abandoned: u64,
    /// Kind of the last gate or human decision ("promoted", "shelved", …).
    pub last_decision: Option<String>,
    pub serving: Option<ModelId>,
    /// When the serving model started serving.
    pub serving_since: Option<DateTime<Utc>>,
    /// Holdout loss of each model when it was trained.
    pub holdout_loss: HashMap<ModelId, f64>,
}

impl Default for Counters {
    fn default() -> Counters {
        Counters {
            last_seq: AuditSeq(0),
            batches: 0,
            rows: 0,
            refused_files: 0,
            duplicate_files: 0,
            cycles_started: 0,
            cycles_abandoned: 0,
            last_decision: None,
            serving: None,
            serving_since: None,
            holdout_loss: HashMap::new(),
        }
    }
}

impl Counters {
    /// Adds one entry (entries at or before `last_seq` are skipped, so
    /// folding the same entries twice counts them once).
    pub fn fold(&mut self, e: &Entry) {
        if e.seq <= self.last_seq {
            return;
        }
        self.last_seq = e.seq;
        let serve = |c: &mut Counters, m: ModelId| {
            c.serving = Some(m);
            c.serving_since = e.timestamp();
        };
        match &e.event {
            Event::BatchAccepted { rows, .. } => {
                self.batches += 1;
                self.rows += rows;
            }
            Event::BatchRefused { .. } => self.refused_files += 1,
            Event::BatchDuplicate { .. } => self.duplicate_files += 1,
            Event::CycleStarted { .. } => self.cycles_started += 1,
            Event::CycleAbandoned { .. } => self.cycles_abandoned += 1,
            Event::CandidateTrained {
                model,
                holdout_loss,
                ..
            } => {
                self.holdout_loss.insert(*model, *holdout_loss);
            }
            Event::Promoted { model, .. }
            | Event::Approved { model, .. }
            | Event::RolledBack { to: model, .. } => {
                serve(self, *model);
                self.last_decision = Some(e.event.kind().to_string());
            }
            Event::Shelved { .. } | Event::AwaitingApproval { .. } | Event::Declined { .. } => {
                self.last_decision = Some(e.event.kind().to_string());
            }
            #[allow(unreachable_patterns)]
            _ => {}
        }
    }
}

/// Durations of the cycles this daemon ran.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct CycleTimes {
    pub count: u64,
    pub sum_seconds: f64,
    pub last_seconds: Option<f64>,
}

/// Everything published, behind one mutex.
#[derive(Debug)]
pub struct Published {
    pub status: DaemonStatus,
    pub counters: Counters,
    pub cycles: CycleTimes,
    /// Last time the loop finished an iteration.
    pub heartbeat: Instant,
}

/// The handle the loop writes to and the socket and HTTP threads read.
#[derive(Debug, Clone)]
pub struct Shared(Arc<Mutex<Published>>);

impl Shared {
    pub fn new(status: DaemonStatus) -> Shared {
        Shared(Arc::new(Mutex::new(Published {
            status,
            counters: Counters::default(),
            cycles: CycleTimes::default(),
            heartbeat: Instant::now(),
        })))
    }

    /// The published data; a panic elsewhere while holding it does not
    /// make it unreadable (it only holds plain values).
    pub fn lock(&self) -> MutexGuard<'_, Published> {
        self.0.lock().unwrap_or_else(|e| e.into_inner())
    }

    pub fn status(&self) -> DaemonStatus {
        self.lock().status.clone()
    }
}

/// How long without a loop iteration before `/health` reports a stall.
pub const STALL: Duration = Duration::from_secs(60);

/// The media type of `render`'s text.
pub const CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// The metrics in OpenMetrics text format.
pub fn render(p: &Published, now: DateTime<Utc>) -> String {
    let c = &p.counters;
    let mut out = String::new();
    let mut metric = |name: &str, kind: &str, help: &str, lines: &[(String, String)]| {
        out.push_str(&format!(
            "# HELP tidegate_{name} {help}\n# TYPE tidegate_{name} {kind}\n"
        ));
        // A counter's family is named without the suffix its sample carries.
        let suffix = if kind == "counter" { "_total" } else { "" };
        for (labels, value) in lines {
            out.push_str(&format!("tidegate_{name}{suffix}{labels} {value}\n"));
        }
    };
    let one = |v: String| vec![(String::new(), v)];
    metric(
        "rows",
        "gauge",
        "Rows stored (all accepted batches).",
        &one(c.rows.to_string()),
    );
    metric(
        "batches",
        "gauge",
        "Accepted batches.",
        &one(c.batches.to_string()),
    );
    metric(
        "refused_files",
        "counter",
        "Files refused, in the whole audit log.",
        &one(c.refused_files.to_string()),
    );
    metric(
        "duplicate_files",
        "counter",
        "Files whose bytes were already stored.",
        &one(c.duplicate_files.to_string()),
    );
    metric(
        "untrained_rows",
        "gauge",
        "Accepted rows no cycle has trained on yet.",
        &one(p.status.untrained_rows.to_string()),
    );
    metric(
        "training",
        "gauge",
        "1 while a retrain cycle runs.",
        &one(u8::from(p.status.activity == "training").to_string()),
    );
    metric(
        "cycles_started",
        "counter",
        "Retrain cycles started, in the whole audit log.",
        &one(c.cycles_started.to_string()),
    );
    metric(
        "cycles_abandoned",
        "counter",
        "Retrain cycles cut short (cancel, crash or failure).",
        &one(c.cycles_abandoned.to_string()),
    );
    if let Some(d) = &c.last_decision {
        metric(
            "last_decision",
            "gauge",
            "The last decision on a model version (label), always 1.",
            &[(format!("{{decision=\"{d}\"}}"), "1".into())],
        );
    }
    if let (Some(m), Some(since)) = (c.serving, c.serving_since) {
        let age = (now - since).num_milliseconds().max(0) as f64 / 1000.0;
        metric(
            "serving_model_age_seconds",
            "gauge",
            "Seconds since the serving model started serving.",
            &[(format!("{{model=\"{m}\"}}"), format!("{age:.3}"))],
        );
        if let Some(loss) = c.holdout_loss.get(&m) {
            metric(
                "serving_holdout_loss",
                "gauge",
                "Mean holdout loss of the serving model when it was trained.",
                &[(format!("{{model=\"{m}\"}}"), number(*loss))],
            );
        }
    }
    let t = &p.cycles;
    // A summary without quantiles: `_sum` and `_count` follow the name.
    metric(
        "cycle_duration_seconds",
        "summary",
        "Wall time of the retrain cycles this daemon ran.",
        &[
            ("_sum".to_string(), format!("{:.3}", t.sum_seconds)),
            ("_count".to_string(), t.count.to_string()),
        ],
    );
    if let Some(last) = t.last_seconds {
        metric(
            "last_cycle_duration_seconds",
            "gauge",
            "Wall time of the last cycle this daemon ran.",
            &one(format!("{last:.3}")),
        );
    }
    out.push_str("# EOF\n");
    out
}

/// A sample value as OpenMetrics spells it (Rust writes infinity as `inf`).
fn number(x: f64) -> String {
    match x {
        f64::INFINITY => "+Inf".into(),
        f64::NEG_INFINITY => "-Inf".into(),
        x => format!("{x}"),
    }
}

/// Requests answered at once; a connection beyond these is closed unanswered.
const MAX_HTTP_CONNECTIONS: usize = 16;

/// The whole time one connection may take, reading and writing together.
const REQUEST_DEADLINE: Duration = Duration::from_secs(5);

/// Serves `/health` and `/metrics` on `addr`: a thread accepts, and each
/// connection is answered on a thread of its own within
/// `REQUEST_DEADLINE`, so a slow or silent client delays nobody else.
pub fn serve(addr: SocketAddr, shared: Shared) -> std::io::Result<SocketAddr> {
    let listener = TcpListener::bind(addr)?;
    let bound = listener.local_addr()?;
    let open = Arc::new(AtomicUsize::new(0));
    std::thread::Builder::new()
        .name("metrics".into())
        .spawn(move || {
            for stream in listener.incoming().flatten() {
                if open.fetch_add(1, Ordering::SeqCst) >= MAX_HTTP_CONNECTIONS {
                    open.fetch_sub(1, Ordering::SeqCst);
                    tracing::debug!("metrics: too many connections at once; one closed");
                    continue;
                }
                let (shared, open) = (shared.clone(), open.clone());
                let spawned = std::thread::Builder::new()
                    .name("metrics-conn".into())
                    .spawn(move || {
                        if let Err(e) = answer_http(stream, &shared) {
                            tracing::debug!("metrics request failed: {e}");
                        }
                        open.fetch_sub(1, Ordering::SeqCst);
                    });
                if spawned.is_err() {
                    tracing::warn!("cannot start a thread for a metrics connection");
                }
            }
        })?;
    Ok(bound)
}

/// Reads from a stream until a fixed moment: each read may wait only for
/// the time left, so trickling one byte at a time does not extend it.
struct UntilDeadline<'a> {
    stream: &'a TcpStream,
    until: Instant,
}

impl std::io::Read for UntilDeadline<'_> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let left = self.until.saturating_duration_since(Instant::now());
        if left.is_zero() {
            return Err(std::io::Error::new(
                std::io::ErrorKind::TimedOut,
                "the request took longer than its deadline",
            ));
        }
        self.stream.set_read_timeout(Some(left))?;
        std::io::Read::read(&mut self.stream, buf)
    }
}

fn answer_http(stream: TcpStream, shared: &Shared) -> std::io::Result<()> {
    let until = Instant::now() + REQUEST_DEADLINE;
    stream.set_write_timeout(Some(REQUEST_DEADLINE))?;
    let timed = UntilDeadline {
        stream: &stream,
        until,
    };
    let mut reader = BufReader::new(std::io::Read::take(timed, 8192));
    let mut line = String::new();
    reader.read_line(&mut line)?;
    let path = line.split_whitespace().nth(1).unwrap_or("").to_string();
    // Read the headers too: closing with unread input would reset the
    // connection before the client has read the answer.
    let mut header = String::new();
    while reader.read_line(&mut header)? > 0 && !header.trim().is_empty() {
        header.clear();
    }
    let (code, body) = {
        let p = shared.lock();
        match path.as_str() {
            "/health" => {
                if p.heartbeat.elapsed() < STALL {
                    ("200 OK", format!("ok {}\n", p.status.activity))
                } else {
                    (
                        "503 Service Unavailable",
                        format!(
                            "stalled: the loop has not run for {} s\n",
                            p.heartbeat.elapsed().as_secs()
                        ),
                    )
                }
            }
            "/metrics" => ("200 OK", render(&p, Utc::now())),
            _ => ("404 Not Found", "try /health or /metrics\n".to_string()),
        }
    };
    let mut w = &stream;
    write!(
        w,
        "HTTP/1.1 {code}\r\nContent-Type: {}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        if path == "/metrics" {
            CONTENT_TYPE
        } else {
            "text/plain; charset=utf-8"
        },
        body.len()
    )?;
    w.flush()
}

/// The strict OpenMetrics reader the integration suite uses on the endpoint.
#[cfg(test)]
#[path = "../../tests/it/openmetrics.rs"]
mod openmetrics;

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ids::BatchId;

    fn entry(seq: u64, event: Event) -> Entry {
        Entry::seal(AuditSeq(seq), Utc::now(), "u", event, "p")
    }

    #[test]
    fn counters_fold_each_entry_once() {
        let mut c = Counters::default();
        let accepted = entry(
            1,
            Event::BatchAccepted {
                batch: BatchId(1),
                file: "a".into(),
                file_hash: "h".into(),
                rows: 10,
                train_rows: 8,
                holdout_rows: 2,
                new_categories: Default::default(),
                new_category_counts: Default::default(),
                drift: None,
                suspect: None,
                rows_file: None,
            },
        );
        c.fold(&accepted);
        c.fold(&accepted);
        c.fold(&entry(
            2,
            Event::BatchRefused {
                file: "b".into(),
                file_hash: String::new(),
                problems: 1,
                first_problem: "x".into(),
                kept_as: None,
            },
        ));
        assert_eq!((c.batches, c.rows, c.refused_files), (1, 10, 1));
        c.fold(&entry(
            3,
            Event::CycleStarted {
                cycle: 1,
                serving: None,
                new_batches: vec![],
                candidates: vec![],
            },
        ));
        c.fold(&entry(4, Event::CycleAbandoned { cycle: 1 }));
        c.fold(&entry(
            5,
            Event::BatchDuplicate {
                file: "c".into(),
                file_hash: "h".into(),
                duplicate_of: BatchId(1),
            },
        ));
        c.fold(&entry(
            6,
            Event::Approved {
                model: ModelId(2),
                previous: None,
                reason: "r".into(),
            },
        ));
        // A loss that overflowed is still a number the format can spell.
        c.holdout_loss.insert(ModelId(2), f64::INFINITY);
        let text = render(
            &Published {
                status: DaemonStatus::default(),
                counters: c,
                cycles: CycleTimes {
                    count: 2,
                    sum_seconds: 3.5,
                    last_seconds: Some(1.5),
                },
                heartbeat: Instant::now(),
            },
            Utc::now(),
        );
        openmetrics::self_check();
        let families = openmetrics::parse(&text).unwrap_or_else(|e| panic!("{e}\n{text}"));
        let family = |name: &str| {
            families
                .iter()
                .find(|f| f.name == format!("tidegate_{name}"))
                .unwrap_or_else(|| panic!("no family {name}: {text}"))
        };
        // Counts that only grow are counters; their one sample ends in _total.
        for (name, value) in [
            ("refused_files", 1.0),
            ("duplicate_files", 1.0),
            ("cycles_started", 1.0),
            ("cycles_abandoned", 1.0),
        ] {
            let f = family(name);
            assert_eq!(f.kind, "counter", "{name}");
            assert_eq!(f.samples.len(), 1, "{name}");
            assert_eq!(f.samples[0].name, format!("tidegate_{name}_total"));
            assert_eq!(f.samples[0].value, value, "{name}");
        }
        // Levels stay gauges.
        for name in [
            "rows",
            "batches",
            "untrained_rows",
            "training",
            "last_decision",
            "serving_model_age_seconds",
            "serving_holdout_loss",
            "last_cycle_duration_seconds",
        ] {
            assert_eq!(family(name).kind, "gauge", "{name}");
        }
        assert_eq!(family("rows").samples[0].value, 10.0);
        assert_eq!(
            family("serving_holdout_loss").samples[0].value,
            f64::INFINITY
        );
        let durations = family("cycle_duration_seconds");
        assert_eq!(durations.kind, "summary");
        assert_eq!(
            durations.samples[1].name,
            "tidegate_cycle_duration_seconds_count"
        );
        assert_eq!(durations.samples[1].value, 2.0);
        assert!(families.iter().all(|f| f.help.is_some()), "{text}");
    }

    #[test]
    fn a_slow_client_does_not_stall_health_for_another() {
        use std::io::{Read, Write};
        use std::sync::atomic::AtomicBool;
        let shared = Shared::new(DaemonStatus::default());
        let addr = serve("127.0.0.1:0".parse().unwrap(), shared).unwrap();
        // Sends one byte of its request line at a time and never ends it.
        let stop = Arc::new(AtomicBool::new(false));
        let mut slow = TcpStream::connect(addr).unwrap();
        let trickle = {
            let stop = stop.clone();
            std::thread::spawn(move || {
                for b in b"GET /health HTTP/1.1 and so on".iter().cycle() {
                    if stop.load(Ordering::SeqCst) || slow.write_all(&[*b]).is_err() {
                        break;
                    }
                    std::thread::sleep(Duration::from_millis(200));
                }
            })
        };
        // Connected first, so a server taking one connection at a time
        // is busy with it when the next one arrives.
        let mut fast = TcpStream::connect(addr).unwrap();
        // Generous: an answer takes microseconds; served one at a time it
        // would never come while the slow client trickles.
        fast.set_read_timeout(Some(Duration::from_secs(15)))
            .unwrap();
        fast.write_all(b"GET /health HTTP/1.1\r\nHost: x\r\n\r\n")
            .unwrap();
        let mut answer = String::new();
        let read = fast.read_to_string(&mut answer);
        stop.store(true, Ordering::SeqCst);
        trickle.join().unwrap();
        read.unwrap();
        assert!(answer.starts_with("HTTP/1.1 200"), "{answer}");
    }
}
