//! The real `tidegate watch` process on temp state dirs: files published to
//! the inbox, CLI commands routed through the control socket, SIGTERM
//! during training, a second daemon, and SIGKILL at random moments while a
//! producer keeps publishing.

use std::collections::BTreeSet;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Child, Stdio};
use std::time::{Duration, Instant};

use tidegate::config::Config;
use tidegate::ids::{BatchId, ModelId};
use tidegate::rng::Rng;
use tidegate::state::{self, StateDir};
use tidegate::store::Split;

use crate::support::{Env, code, data, stderr, stdout};

/// The fixtures' schema with a daemon that reacts fast and trains briefly
/// (`long`: until cancelled).
pub(crate) fn config(dir: &Path, daemon: &str, long: bool) -> PathBuf {
    let training = if long {
        "[training]\ncold_epochs = 1000000\npatience = 0\nmax_seconds = 600.0\n"
    } else {
        "[training]\ncold_epochs = 5\n"
    };
    let text = format!(
        "{}\n[model]\nhidden = [4]\n\n{training}\n[daemon]\nrescan_seconds = 1.0\n{daemon}\n",
        fs::read_to_string(data("small.toml")).unwrap()
    );
    let path = dir.join("daemon.toml");
    fs::write(&path, text).unwrap();
    path
}

pub(crate) fn env_with(daemon: &str, long: bool) -> Env {
    let tmp = tempfile::tempdir().unwrap();
    let cfg = config(tmp.path(), daemon, long);
    let env = Env::new(&cfg);
    drop(tmp);
    env
}

/// A running daemon; killed if a test fails before stopping it.
pub(crate) struct Watch {
    child: Child,
}

impl Drop for Watch {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Watch {
    pub(crate) fn start(env: &Env) -> Watch {
        let log = fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(env.dir.path().join("watch.log"))
            .unwrap();
        let child = env
            .command()
            .arg("watch")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .unwrap();
        let mut w = Watch { child };
        wait_for(20, "the daemon to answer ping", || {
            if let Ok(Some(status)) = w.child.try_wait() {
                panic!("watch exited early with {status}: {}", watch_log(env));
            }
            daemon_status(env).is_some()
        });
        w
    }

    fn pid(&self) -> i32 {
        i32::try_from(self.child.id()).unwrap()
    }

    fn signal(&self, sig: i32) {
        // SAFETY: kill(2) on our own child's pid.
        assert_eq!(unsafe { libc::kill(self.pid(), sig) }, 0);
    }

    /// SIGTERM, then the exit code and how long it took.
    pub(crate) fn stop(mut self) -> (i32, Duration) {
        let t = Instant::now();
        self.signal(libc::SIGTERM);
        let deadline = t + Duration::from_secs(10);
        loop {
            if let Some(status) = self.child.try_wait().unwrap() {
                return (status.code().unwrap_or(-1), t.elapsed());
            }
            assert!(Instant::now() < deadline, "no exit 10 s after SIGTERM");
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

pub(crate) fn watch_log(env: &Env) -> String {
    fs::read_to_string(env.dir.path().join("watch.log")).unwrap_or_default()
}

/// Polls `ok` every 20 ms until it holds, failing after `secs` seconds.
pub(crate) fn wait_for(secs: u64, what: &str, mut ok: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(secs);
    while !ok() {
        assert!(Instant::now() < deadline, "timed out waiting for {what}");
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Like `wait_for`, with the daemon's log in the failure message.
pub(crate) fn wait_daemon(env: &Env, secs: u64, what: &str, mut ok: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(secs);
    while !ok() {
        assert!(
            Instant::now() < deadline,
            "timed out waiting for {what}; daemon log:\n{}",
            watch_log(env)
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// The daemon's status as `status --json` reports it (`None`: not running).
fn daemon_status(env: &Env) -> Option<serde_json::Value> {
    let out = env.run(&["--json", "status"]);
    if !out.status.success() {
        return None;
    }
    let v: serde_json::Value = serde_json::from_str(&stdout(&out)).ok()?;
    v.get("daemon").filter(|d| !d.is_null()).cloned()
}

/// One `ping` over control.sock, written by hand as the protocol says.
fn raw_ping(env: &Env) -> serde_json::Value {
    use std::io::{BufRead, Write};
    let mut s = std::os::unix::net::UnixStream::connect(env.state().join("control.sock")).unwrap();
    s.write_all(b"{\"v\":2,\"user\":\"tester\",\"json\":true,\"request\":{\"op\":\"ping\"}}\n")
        .unwrap();
    let mut line = String::new();
    std::io::BufReader::new(s).read_line(&mut line).unwrap();
    serde_json::from_str(&line).unwrap()
}

/// A plain HTTP/1.1 GET; the whole response as text.
fn http_get(addr: &str, path: &str) -> String {
    use std::io::{Read, Write};
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    s.write_all(format!("GET {path} HTTP/1.1\r\nHost: {addr}\r\n\r\n").as_bytes())
        .unwrap();
    let mut out = String::new();
    s.read_to_string(&mut out).unwrap();
    out
}

/// CSV text with rows whose ids start at `first`.
pub(crate) fn rows_csv(first: usize, n: usize) -> String {
    let mut text = String::from("id,city,temp,flag,y\n");
    for id in first..first + n {
        text.push_str(&format!(
            "{id},{},{}.5,x,{}\n",
            ["Oslo", "Lima", "Rome"][id % 3],
            id % 30,
            (id % 30) as f64 * 0.5 + (id % 3) as f64
        ));
    }
    text
}

/// Publishes by writing under inbox/.tmp and renaming (the producer contract).
fn publish(env: &Env, name: &str, text: &str) -> PathBuf {
    let inbox = env.state().join("inbox");
    let tmp = inbox.join(".tmp").join(name);
    fs::write(&tmp, text).unwrap();
    let dest = inbox.join(name);
    fs::rename(&tmp, &dest).unwrap();
    dest
}

fn inbox_files(env: &Env) -> Vec<String> {
    fs::read_dir(env.state().join("inbox"))
        .unwrap()
        .filter_map(Result::ok)
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with('.'))
        .collect()
}

pub(crate) fn count_kind(env: &Env, kind: &str) -> usize {
    env.log_json(&["--kind", kind]).len()
}

#[test]
fn watch_takes_published_files_and_retrains() {
    // A settle time well above the producer's pauses, so a loaded machine
    // does not make the slow writer look finished.
    let env = env_with("settle_seconds = 2.0\nmin_new_rows = 60", false);
    let watch = Watch::start(&env);
    publish(&env, "a.csv", &rows_csv(0, 30));
    publish(&env, "b.csv", &rows_csv(30, 30));
    publish(&env, "bad.csv", "id,city,temp,flag,y\n1,Oslo,hot,x,1\n");
    // A producer that writes in place, slowly: only the whole file may be taken.
    let slow = env.state().join("inbox/slow.csv");
    let text = rows_csv(1000, 12);
    let (head, tail) = text.split_at(text.len() / 2);
    let head_end = head.rfind('\n').unwrap() + 1;
    fs::write(&slow, &text[..head_end]).unwrap();
    for chunk in text.as_bytes()[head_end..].chunks(tail.len() / 3 + 1) {
        std::thread::sleep(Duration::from_millis(150));
        let mut f = fs::OpenOptions::new().append(true).open(&slow).unwrap();
        std::io::Write::write_all(&mut f, chunk).unwrap();
    }
    wait_daemon(&env, 30, "all four files to be taken", || {
        inbox_files(&env).is_empty()
    });
    wait_daemon(&env, 60, "the cycle's decision", || {
        count_kind(&env, "shelved") + count_kind(&env, "promoted") >= 1
    });
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    assert_eq!(accepted.len(), 3, "{accepted:?}");
    let slow_entry = accepted
        .iter()
        .find(|e| e["file"] == "slow.csv")
        .unwrap_or_else(|| panic!("slow.csv not accepted: {accepted:?}"));
    assert_eq!(
        slow_entry["rows"], 12,
        "the half-written file was taken early: {slow_entry}"
    );
    assert_eq!(count_kind(&env, "batch-refused"), 1);
    assert!(env.state().join("refused/bad.csv.why.json").exists());
    assert_eq!(count_kind(&env, "cycle-started"), 1, "{}", watch_log(&env));
    let (code, took) = watch.stop();
    assert_eq!(code, 0, "{}", watch_log(&env));
    assert!(took < Duration::from_secs(5), "took {took:?} to stop");
}

#[test]
fn cli_commands_go_through_the_daemon_and_read_only_ones_read_files() {
    let env = env_with(
        "settle_seconds = 0.2\nmin_new_rows = 100000\nmetrics_addr = \"127.0.0.1:0\"",
        false,
    );
    let watch = Watch::start(&env);
    use std::os::unix::fs::PermissionsExt;
    let sock = fs::metadata(env.state().join("control.sock")).unwrap();
    assert_eq!(sock.permissions().mode() & 0o777, 0o600);
    // Routed: printed exactly as a direct ingest prints it.
    let out = env.ingest(&[data("good/plain.csv")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(
        stdout(&out).starts_with(&format!(
            "{}: accepted: batch b000001 with 3 rows",
            data("good/plain.csv").display()
        )),
        "{}",
        stdout(&out)
    );
    let out = env.run(&["--json", "ingest", data("good/crlf.csv").to_str().unwrap()]);
    let v: serde_json::Value = serde_json::from_str(&stdout(&out)).unwrap();
    assert_eq!(v["status"], "accepted");
    // A refused file gives the same exit code through the socket.
    let out = env.ingest(&[data("bad/hex-number.csv")]);
    assert_eq!(code(&out), 65, "{}", stderr(&out));
    // A missing file is an error for the command, not for the daemon.
    let out = env.ingest(&[env.dir.path().join("missing.csv")]);
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("missing.csv"), "{}", stderr(&out));
    let more = env.dir.path().join("more.csv");
    fs::write(&more, rows_csv(100, 40)).unwrap();
    assert_eq!(code(&env.ingest(&[more])), 0);
    // Decisions are taken (or refused) by the daemon.
    let out = env.run(&["rollback", "--reason", "test"]);
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("no model serves"), "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(stdout(&out).contains("decision: "), "{}", stdout(&out));
    // The daemon is named by status; read-only commands answer.
    let out = env.run(&["status"]);
    assert!(
        stdout(&out).contains("daemon      running"),
        "{}",
        stdout(&out)
    );
    for args in [&["log"][..], &["models"], &["verify"]] {
        let out = env.run(args);
        assert_eq!(code(&out), 0, "{args:?}: {}", stderr(&out));
    }
    // A backup is written by the daemon, which holds the store.
    let out = env.run(&[
        "backup",
        "--out",
        env.dir.path().join("copy").to_str().unwrap(),
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(
        stdout(&out).contains("backup written to"),
        "{}",
        stdout(&out)
    );
    assert!(env.dir.path().join("copy").is_dir());
    // The metrics endpoint (port chosen by the system, named in the log).
    let log = watch_log(&env);
    let addr = log
        .split("metrics on http://")
        .nth(1)
        .and_then(|r| r.split("/metrics").next())
        .unwrap_or_else(|| panic!("no metrics address in the log: {log}"));
    let metrics = http_get(addr, "/metrics");
    assert!(metrics.starts_with("HTTP/1.1 200"), "{metrics}");
    let (head, body) = metrics.split_once("\r\n\r\n").expect("headers end");
    assert!(
        head.contains(
            "\r\nContent-Type: application/openmetrics-text; version=1.0.0; charset=utf-8\r\n"
        ),
        "{head}"
    );
    let families = crate::openmetrics::parse(body).unwrap_or_else(|e| panic!("{e}\n{body}"));
    let sample = |family: &str| {
        let f = families
            .iter()
            .find(|f| f.name == family)
            .unwrap_or_else(|| panic!("no family {family}: {body}"));
        (
            f.kind.clone(),
            f.samples[0].name.clone(),
            f.samples[0].value,
        )
    };
    assert_eq!(
        sample("tidegate_batches"),
        ("gauge".into(), "tidegate_batches".into(), 3.0)
    );
    assert_eq!(
        sample("tidegate_refused_files"),
        ("counter".into(), "tidegate_refused_files_total".into(), 1.0)
    );
    assert_eq!(
        sample("tidegate_cycles_started").1,
        "tidegate_cycles_started_total"
    );
    assert_eq!(sample("tidegate_last_decision").0, "gauge");
    assert!(http_get(addr, "/health").starts_with("HTTP/1.1 200"));
    assert!(http_get(addr, "/other").starts_with("HTTP/1.1 404"));
    // A second daemon is refused with the owner's PID.
    let out = env.run(&["watch"]);
    assert_eq!(code(&out), 75, "{}", stderr(&out));
    assert!(stderr(&out).contains(&watch.pid().to_string()));
    assert_eq!(count_kind(&env, "batch-accepted"), 3);
    let who: Vec<String> = env
        .log_json(&["--kind", "batch-accepted"])
        .iter()
        .map(|e| e["user"].as_str().unwrap_or("").to_string())
        .collect();
    // The client says USER=tester; the log names the account of the
    // peer's uid, which the client cannot choose.
    let id = std::process::Command::new("id")
        .arg("-un")
        .output()
        .unwrap();
    let me = String::from_utf8(id.stdout).unwrap().trim().to_string();
    assert_ne!(me, "tester");
    assert_eq!(who, [me.as_str(); 3], "the peer's account is recorded");
    let (code, _) = watch.stop();
    assert_eq!(code, 0);
    let out = env.run(&["status"]);
    assert!(
        stdout(&out).contains("daemon      not running"),
        "{}",
        stdout(&out)
    );
}

/// The account name of this process's uid (what the daemon records).
fn me() -> String {
    let id = std::process::Command::new("id")
        .arg("-un")
        .output()
        .unwrap();
    String::from_utf8(id.stdout).unwrap().trim().to_string()
}

#[test]
fn set_aside_and_bring_back_go_through_the_daemon_and_a_waiting_candidate_that_saw_the_batch_is_not_approved()
 {
    // The tiny linear state (its first candidate beats the trivial
    // predictor), in approval mode, with a daemon that never trains by itself.
    let config = format!(
        "{}require_approval = true\n\n[daemon]\nsettle_seconds = 0.2\nmin_new_rows = 100000\n",
        crate::support::TINY_CONFIG
    );
    let env = Env::with_config_text(&config);
    let files: Vec<PathBuf> = (0..3)
        .map(|i| {
            let file = env.dir.path().join(format!("rows-{i}.csv"));
            fs::write(&file, crate::support::tiny_rows(i * 200, 200)).unwrap();
            file
        })
        .collect();
    let watch = Watch::start(&env);
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));

    // Done by the daemon (the direct path would find the store locked,
    // exit 75), printed as the direct command prints it.
    let out = env.run(&["set-aside", "b000002", "--reason", "export was broken"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(
        stdout(&out),
        "b000002 set aside by hand: export was broken\n"
    );
    let entries = env.log_json(&["--kind", "batch-set-aside"]);
    assert_eq!(entries.len(), 1, "{entries:?}");
    // The client says USER=tester; the log names the peer's account.
    assert_eq!(entries[0]["user"], me().as_str());
    assert_eq!(entries[0]["reason"], "export was broken");
    assert_eq!(entries[0]["batch"], 2);
    let status = env.status_json();
    assert!(status["summary"]["set_aside"]["2"].is_string(), "{status}");
    assert!(!status["daemon"].is_null(), "{status}");
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
    // The command's own refusals come back as they would directly, and
    // the daemon goes on.
    env.refused(
        &["set-aside", "b000002", "--reason", "again"],
        1,
        "b000002 is already set aside",
    );
    env.refused(
        &["set-aside", "b000009", "--reason", "x"],
        1,
        "no batch b000009",
    );
    env.refused(
        &["bring-back", "b000001", "--reason", "x"],
        1,
        "not set aside",
    );

    // --json prints the audit entry, as directly.
    let out = env.run(&[
        "--json",
        "bring-back",
        "b000002",
        "--reason",
        "the file was fine",
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let v: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(v["kind"], "batch-brought-back");
    assert_eq!(v["user"], me().as_str());
    assert_eq!(v["reason"], "the file was fine");
    assert_eq!(
        env.log_json(&["--kind", "batch-brought-back"]),
        vec![v.clone()]
    );
    assert!(
        env.status_json()["summary"]["set_aside"]
            .as_object()
            .unwrap()
            .is_empty()
    );
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));

    // A candidate that trained on a batch and waits for approval when that
    // batch is set aside (as when the set-aside waited for its cycle):
    // judged on the batch's holdout rows, so it cannot be approved.
    let out = env.run(&["--json", "retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(r["outcome"], "await-approval", "{r}");
    let out = env.run(&["set-aside", "b000002", "--reason", "late doubt"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    env.refused(
        &["approve", "m000001", "--reason", "looks fine"],
        1,
        "m000001 trained on b000002",
    );
    assert_eq!(count_kind(&env, "approved"), 0);
    assert!(env.status_json()["summary"]["serving"].is_null());
    let out = env.run(&["decline", "m000001", "--reason", "saw the broken export"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    // The next cycle neither trains on nor scores the batch.
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let holdout_in_use: u64 = env
        .log_json(&["--kind", "batch-accepted"])
        .iter()
        .filter(|e| e["batch"] != 2)
        .map(|e| e["holdout_rows"].as_u64().unwrap())
        .sum();
    let trained = env.log_json(&["--kind", "candidate-trained"]);
    let last = trained.last().unwrap();
    assert_eq!(last["cycle"], 2, "{trained:?}");
    assert_eq!(last["holdout_rows"].as_u64().unwrap(), holdout_in_use);
    let out = env.run(&["--json", "models"]);
    let m2: serde_json::Value = stdout(&out)
        .lines()
        .map(|l| serde_json::from_str::<serde_json::Value>(l).unwrap())
        .find(|m| m["id"] == 2)
        .unwrap_or_else(|| panic!("no m000002: {}", stdout(&out)));
    assert_eq!(m2["batches_seen"], serde_json::json!([1, 3]), "{m2}");

    let (code_at_stop, _) = watch.stop();
    assert_eq!(code_at_stop, 0, "{}", watch_log(&env));
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}

#[test]
fn sigterm_during_training_exits_promptly_and_leaves_the_store_usable() {
    let env = env_with("settle_seconds = 0.0\nmin_new_rows = 20", true);
    let watch = Watch::start(&env);
    publish(&env, "a.csv", &rows_csv(0, 40));
    wait_daemon(&env, 30, "training to start", || {
        daemon_status(&env).is_some_and(|d| d["activity"] == "training")
    });
    // Ping (the raw protocol) and read-only commands answer while the worker trains.
    let t = Instant::now();
    let status = raw_ping(&env);
    assert!(
        t.elapsed() < Duration::from_secs(1),
        "ping took {:?}",
        t.elapsed()
    );
    assert_eq!(status["status"]["activity"], "training", "{status}");
    assert_eq!(status["status"]["cycle"], 1);
    assert!(daemon_status(&env).is_some());
    assert_eq!(code(&env.run(&["models"])), 0);
    assert_eq!(code(&env.run(&["log", "--limit", "3"])), 0);
    let (code_, took) = watch.stop();
    assert_eq!(code_, 0, "{}", watch_log(&env));
    assert!(took < Duration::from_secs(5), "took {took:?} to stop");
    assert!(!env.state().join("control.sock").exists());
    let kinds: Vec<String> = env
        .log_json(&[])
        .iter()
        .map(|e| e["kind"].as_str().unwrap_or("").to_string())
        .collect();
    assert_eq!(
        kinds.last().map(String::as_str),
        Some("cycle-abandoned"),
        "{kinds:?}"
    );
    assert!(
        !env.state().join("serving").exists(),
        "a model started serving"
    );
    // The lock is free: a direct command runs.
    let out = env.ingest(&[data("good/plain.csv")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
}

const KILL_ROWS: usize = 15;
const KILL_FILES_PER_ROUND: usize = 3;
/// Daemon kills in CI; `TIDEGATE_SOAK_KILLS` raises it (`ops/crash-soak.sh`).
const KILLS: usize = 20;

/// A daemon that trains small models fast enough for cycles to start, be
/// judged and promote between kills (a cycle every eight files or so).
fn kill_loop_env() -> Env {
    let tmp = tempfile::tempdir().unwrap();
    let text = format!(
        "{}\n[model]\nhidden = [4]\n\n[training]\ncold_epochs = 20\nwarm_epochs = 5\n\
         batch_size = 32\nlearning_rate = 0.02\npatience = 0\n\n\
         [gate]\nmin_holdout_rows = 30\n\n\
         [daemon]\nrescan_seconds = 1.0\nsettle_seconds = 0.0\nmin_new_rows = 120\n",
        fs::read_to_string(data("small.toml")).unwrap()
    );
    let cfg = tmp.path().join("daemon.toml");
    fs::write(&cfg, text).unwrap();
    Env::new(&cfg)
}

/// How one restarted daemon ended.
enum Death {
    /// Killed with SIGKILL by the test.
    Killed,
    /// Aborted itself at the armed failpoint.
    Failpoint,
}

/// Starts `watch` (with `point` armed to abort), lets a producer publish a
/// few files, then waits a random moment and kills it, unless the armed
/// point ends it first. Files published so far are added to `published`.
fn kill_round(
    env: &Env,
    rng: &mut Rng,
    point: Option<&str>,
    published: &mut usize,
    bad: &mut BTreeSet<String>,
) -> Death {
    let log = fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(env.dir.path().join("watch.log"))
        .unwrap();
    let mut cmd = env.command();
    if let Some(p) = point {
        cmd.env("TIDEGATE_FAILPOINTS", format!("{p}=abort"));
    }
    let mut child = cmd
        .arg("watch")
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(log)
        .spawn()
        .unwrap();
    // Exited by itself: only an abort at the armed point is allowed.
    let ended = |child: &mut Child| -> Option<Death> {
        let status = child.try_wait().unwrap()?;
        use std::os::unix::process::ExitStatusExt;
        assert!(
            point.is_some() && status.signal() == Some(libc::SIGABRT),
            "watch ended with {status} (armed: {point:?}): {}",
            watch_log(env)
        );
        Some(Death::Failpoint)
    };
    // Up (it answers ping), or dead at a start-up failpoint.
    let deadline = Instant::now() + Duration::from_secs(20);
    loop {
        if let Some(d) = ended(&mut child) {
            return d;
        }
        if daemon_status(env).is_some() {
            break;
        }
        assert!(
            Instant::now() < deadline,
            "watch did not start: {}",
            watch_log(env)
        );
        std::thread::sleep(Duration::from_millis(10));
    }
    // A producer publishes a few files while the daemon runs...
    for _ in 0..KILL_FILES_PER_ROUND {
        let name = format!("f{published:05}.csv");
        if rng.below(9) == 0 {
            publish(env, &name, "id,city,temp,flag,y\n1,Oslo,x,x,1\n");
            bad.insert(name);
        } else {
            publish(env, &name, &rows_csv(*published * KILL_ROWS, KILL_ROWS));
        }
        *published += 1;
        std::thread::sleep(Duration::from_millis(rng.below(40) as u64));
    }
    // ...and the daemon dies at a random moment, or at the armed point if
    // it meets it first (a cycle's points need a cycle to start).
    let wait = if point.is_some() {
        Duration::from_millis(300 + rng.below(700) as u64)
    } else {
        Duration::from_millis(rng.below(250) as u64)
    };
    let until = Instant::now() + wait;
    while Instant::now() < until {
        if let Some(d) = ended(&mut child) {
            return d;
        }
        std::thread::sleep(Duration::from_millis(5));
    }
    let _ = child.kill();
    let status = child.wait().unwrap();
    use std::os::unix::process::ExitStatusExt;
    if status.signal() == Some(libc::SIGABRT) {
        assert!(point.is_some(), "watch aborted unarmed: {}", watch_log(env));
        return Death::Failpoint;
    }
    Death::Killed
}

/// A batch or model number in a JSON log entry (a number, or its name).
fn id_in(v: &serde_json::Value) -> u64 {
    v.as_u64()
        .or_else(|| v.as_str().and_then(|s| s[1..].parse().ok()))
        .unwrap_or_else(|| panic!("not an id: {v}"))
}

/// Names of temp files a crash may leave, anywhere under `dir`.
fn temp_files(dir: &Path) -> Vec<PathBuf> {
    let mut found = Vec::new();
    for e in fs::read_dir(dir).unwrap() {
        let e = e.unwrap();
        let name = e.file_name().to_string_lossy().into_owned();
        let path = e.path();
        if name.starts_with(tidegate::fsutil::TEMP_PREFIX)
            || name.starts_with(".pending-")
            || name.ends_with(".generating")
        {
            found.push(path.clone());
        }
        if e.file_type().unwrap().is_dir() {
            found.extend(temp_files(&path));
        }
    }
    found
}

#[test]
fn killed_daemons_never_lose_or_double_a_file() {
    let kills = crate::support::soak_kills(KILLS);
    let env = kill_loop_env();
    let mut rng = Rng::new(515);
    let mut published = 0;
    let mut bad = BTreeSet::new();
    let mut random_kills = 0;
    let mut at_points: std::collections::BTreeMap<&str, usize> = Default::default();
    let started = Instant::now();
    for _ in 0..kills {
        // One restart in three arms a failpoint, chosen among all of them.
        let point = (rng.below(3) == 0)
            .then(|| tidegate::failpoint::POINTS[rng.below(tidegate::failpoint::POINTS.len())]);
        match kill_round(&env, &mut rng, point, &mut published, &mut bad) {
            Death::Killed => random_kills += 1,
            Death::Failpoint => *at_points.entry(point.unwrap()).or_default() += 1,
        }
    }
    // A final clean run takes whatever is left and finishes any cycle due.
    let watch = Watch::start(&env);
    wait_daemon(&env, 60, "the inbox to empty", || {
        inbox_files(&env).is_empty()
    });
    wait_daemon(&env, 60, "the daemon to be idle", || {
        daemon_status(&env).is_some_and(|d| d["activity"] == "idle")
    });
    let (code_, _) = watch.stop();
    assert_eq!(code_, 0, "{}", watch_log(&env));

    // What the clean stop left, before anything opens the state dir again
    // (an owner's start-up recovery would tidy up after a bug).
    let inbox = env.state().join("inbox");
    let left: Vec<_> = fs::read_dir(&inbox)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n != ".tmp")
        .collect();
    assert!(left.is_empty(), "left in the inbox: {left:?}");
    assert_eq!(fs::read_dir(inbox.join(".tmp")).unwrap().count(), 0);
    let temps = temp_files(&env.state());
    assert!(temps.is_empty(), "temp files left: {temps:?}");

    let log = env.log_json(&[]);
    let of_kind = |kind: &str| -> Vec<&serde_json::Value> {
        log.iter().filter(|e| e["kind"] == kind).collect()
    };
    let good: BTreeSet<String> = (0..published)
        .map(|f| format!("f{f:05}.csv"))
        .filter(|n| !bad.contains(n))
        .collect();
    // Every good file accepted once, with its exact bytes in the archive.
    let accepted = of_kind("batch-accepted");
    let accepted_set: BTreeSet<String> = accepted
        .iter()
        .map(|e| e["file"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(accepted.len(), accepted_set.len(), "a file accepted twice");
    assert_eq!(accepted_set, good, "a good file lost");
    for e in &accepted {
        let archived = env
            .state()
            .join("archive")
            .join(format!("{}.csv", BatchId(id_in(&e["batch"]))));
        let bytes =
            fs::read(&archived).unwrap_or_else(|err| panic!("{}: {err}", archived.display()));
        assert_eq!(
            blake3::hash(&bytes).to_hex().as_str(),
            e["file_hash"].as_str().unwrap(),
            "{} holds the file's bytes",
            archived.display()
        );
    }
    // Every bad file refused, kept with its reasons.
    let refused = of_kind("batch-refused");
    let refused_set: BTreeSet<String> = refused
        .iter()
        .map(|e| e["file"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(refused_set, bad, "a bad file not refused");
    for e in &refused {
        let kept = env.state().join(e["kept_as"].as_str().unwrap());
        assert!(kept.exists(), "{} missing", kept.display());
        let why = kept.with_file_name(format!(
            "{}.why.json",
            kept.file_name().unwrap().to_string_lossy()
        ));
        assert!(why.exists(), "{} missing", why.display());
    }
    // A kill between archiving a file and removing it from the inbox makes
    // the next run see the same bytes again: logged as a duplicate, never stored.
    for dup in of_kind("batch-duplicate") {
        let name = dup["file"].as_str().unwrap();
        assert!(good.contains(name), "{name} logged as a duplicate");
    }
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));

    let state = StateDir::new(env.state());
    let config = Config::load(&state.config()).unwrap();
    let (owner, _) = state::open(&state, &config).unwrap();
    // The serving model came to serve by a promotion the log records, and
    // its checkpoint verifies.
    let serving = owner.store.serving().unwrap();
    let serving = serving.expect("the kill loop's data is learnable: some model serves");
    let promoted: BTreeSet<String> = of_kind("promoted")
        .iter()
        .chain(of_kind("approved").iter())
        .map(|e| ModelId(id_in(&e["model"])).to_string())
        .collect();
    assert!(
        promoted.contains(&serving.to_string()),
        "{serving} serves but was never promoted: {promoted:?}"
    );
    tidegate::model::checkpoint::verify(&tidegate::model::checkpoint::model_dir(
        &state.models(),
        serving,
    ))
    .unwrap();
    assert_eq!(
        fs::read_to_string(state.serving()).unwrap(),
        format!("{serving}\n")
    );
    // Every row id stored exactly once.
    let id_col = owner.store.schema().index_of("id").unwrap();
    let mut seen: std::collections::BTreeMap<usize, usize> = Default::default();
    for split in [Split::Train, Split::Holdout] {
        let m = owner.store.rows(split, None, None).unwrap();
        for r in 0..m.n_rows() {
            *seen
                .entry(m.number(r, id_col).unwrap() as usize)
                .or_default() += 1;
        }
    }
    let want: Vec<usize> = (0..published)
        .filter(|f| !bad.contains(&format!("f{f:05}.csv")))
        .flat_map(|f| f * KILL_ROWS..(f + 1) * KILL_ROWS)
        .collect();
    let stored: usize = seen.values().sum();
    let lost = want.iter().filter(|id| !seen.contains_key(*id)).count();
    let doubled: usize = seen.values().map(|n| n - 1).sum();
    let strays = seen
        .keys()
        .filter(|id| want.binary_search(id).is_err())
        .count();
    let hits: Vec<String> = at_points.iter().map(|(p, n)| format!("{p} {n}")).collect();
    println!(
        "daemon kill loop: {kills} restarts in {:.1} s; killed at random moments {random_kills}; \
         killed at failpoints {} ({}); files published {published}, archived {}, refused {} ({} refusal entries), \
         duplicates set aside {}; rows published {}, stored {stored}, lost {lost}, doubled {doubled}; \
         cycles started {}, promoted {}; serving {serving}",
        started.elapsed().as_secs_f64(),
        at_points.values().sum::<usize>(),
        hits.join(", "),
        accepted_set.len(),
        refused_set.len(),
        refused.len(),
        of_kind("batch-duplicate").len(),
        want.len(),
        of_kind("cycle-started").len(),
        of_kind("promoted").len(),
    );
    assert_eq!(
        (lost, doubled, strays),
        (0, 0, 0),
        "rows lost, doubled, unknown"
    );
    assert_eq!(stored, want.len());
}

/// Latency from publishing a file to its `batch-accepted` entry and to the
/// decision of the cycle it starts, on a store that already holds rows and
/// a serving model (so the measured cycle is a warm one). Sizes from
/// TIDEGATE_LATENCY_STORE_ROWS (default 100000) and
/// TIDEGATE_LATENCY_BATCH_ROWS (default 10000):
/// `cargo test --release --test it daemon::latency -- --ignored --nocapture`
#[test]
#[ignore = "a measurement, not a check; prints the figures"]
fn latency_from_file_drop_to_decision() {
    let env_num = |k: &str, d: usize| {
        std::env::var(k)
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(d)
    };
    let store_rows = env_num("TIDEGATE_LATENCY_STORE_ROWS", 100_000);
    let batch_rows = env_num("TIDEGATE_LATENCY_BATCH_ROWS", 10_000);
    let tmp = tempfile::tempdir().unwrap();
    let text = fs::read_to_string(data("small.toml"))
        .unwrap()
        .replace("max_file_bytes = 4096", "max_file_bytes = 268435456")
        + &format!(
            "\n[training]\ncold_epochs = 3\n\n[daemon]\nsettle_seconds = 0.0\nmin_new_rows = {batch_rows}\n"
        );
    let cfg = tmp.path().join("latency.toml");
    fs::write(&cfg, text).unwrap();
    let env = Env::new(&cfg);
    // The existing store, in files of at most 100k rows, and a first model.
    let t = Instant::now();
    let mut files = Vec::new();
    let mut first = 0;
    while first < store_rows {
        let n = (store_rows - first).min(100_000);
        let p = tmp.path().join(format!("seed-{first}.csv"));
        fs::write(&p, rows_csv(first, n)).unwrap();
        files.push(p);
        first += n;
    }
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    eprintln!(
        "seeded {store_rows} rows and a first model in {:.1} s",
        t.elapsed().as_secs_f64()
    );
    let watch = Watch::start(&env);
    let text = rows_csv(store_rows, batch_rows);
    let audit = env.state().join("audit.jsonl");
    let seen = |kinds: &[&str], after: usize| -> bool {
        let text = fs::read_to_string(&audit).unwrap_or_default();
        text.lines().skip(after).any(|l| {
            serde_json::from_str::<serde_json::Value>(l)
                .ok()
                .and_then(|v| v["kind"].as_str().map(|k| kinds.contains(&k)))
                .unwrap_or(false)
        })
    };
    let before = fs::read_to_string(&audit).unwrap().lines().count();
    // Measured when the entries are seen in audit.jsonl (polled every 5 ms).
    let dropped = Instant::now();
    publish(&env, "new.csv", &text);
    let mut accepted = None;
    let deadline = dropped + Duration::from_secs(1800);
    let decided = loop {
        if accepted.is_none() && seen(&["batch-accepted"], before) {
            accepted = Some(dropped.elapsed());
        }
        if seen(&["promoted", "shelved", "awaiting-approval"], before) {
            break dropped.elapsed();
        }
        assert!(
            Instant::now() < deadline,
            "no decision: {}",
            watch_log(&env)
        );
        std::thread::sleep(Duration::from_millis(5));
    };
    let accepted = accepted.unwrap_or(decided);
    eprintln!(
        "store {store_rows} rows, batch {batch_rows} rows: drop -> batch-accepted {} ms, drop -> decision {} ms",
        accepted.as_millis(),
        decided.as_millis()
    );
    for l in fs::read_to_string(&audit).unwrap().lines().skip(before) {
        let v: serde_json::Value = serde_json::from_str(l).unwrap();
        eprintln!(
            "  {} {} {}",
            v["kind"], v["candidates"], v["evidence"]["reason"]
        );
    }
    let (c, _) = watch.stop();
    assert_eq!(c, 0);
}
