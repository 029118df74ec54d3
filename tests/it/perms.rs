//! Faults the operating system raises, not failpoints: a state dir (or its
//! archive) that cannot be written, an inbox file that cannot be read, and a
//! full disk (a small tmpfs). Each must give a clear error naming the path
//! and the cause, exit non-zero, leave no partial state, and go away once
//! the fault does.
//!
//! Root ignores file permissions, so when the suite runs as root the child
//! `tidegate` runs as uid/gid 65534 (nobody) from a copy of the binary that
//! uid can execute, on a state dir handed over to it.

use std::fs;
use std::os::unix::fs::PermissionsExt;
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use crate::support::{Env, code, data, stderr, stdout};

const NOBODY: u32 = 65534;

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions.
    unsafe { libc::geteuid() == 0 }
}

/// Runs the binary as the user the permission checks apply to.
struct Runner {
    exe: PathBuf,
    uid: Option<u32>,
    _bin: Option<tempfile::TempDir>,
}

impl Runner {
    fn new() -> Runner {
        if !is_root() {
            return Runner {
                exe: PathBuf::from(env!("CARGO_BIN_EXE_tidegate")),
                uid: None,
                _bin: None,
            };
        }
        // The build dir may not be reachable for nobody: a copy it can run.
        let bin = tempfile::tempdir().unwrap();
        fs::set_permissions(bin.path(), fs::Permissions::from_mode(0o755)).unwrap();
        let exe = bin.path().join("tidegate");
        fs::copy(env!("CARGO_BIN_EXE_tidegate"), &exe).unwrap();
        fs::set_permissions(&exe, fs::Permissions::from_mode(0o755)).unwrap();
        Runner {
            exe,
            uid: Some(NOBODY),
            _bin: Some(bin),
        }
    }

    /// Gives `env`'s whole temp dir to the user the child runs as.
    fn hand_over(&self, env: &Env) {
        if let Some(uid) = self.uid {
            chown_tree(env.dir.path(), uid);
        }
    }

    fn command(&self, env: &Env) -> Command {
        let mut c = Command::new(&self.exe);
        c.arg("--state")
            .arg(env.state())
            .current_dir(env.dir.path())
            .env_remove("TIDEGATE_STATE")
            .env_remove("TIDEGATE_FAILPOINTS")
            .env("USER", "tester")
            .env("NO_COLOR", "1");
        if let Some(uid) = self.uid {
            c.uid(uid).gid(uid);
        }
        c
    }

    fn run(&self, env: &Env, args: &[&str]) -> Output {
        self.command(env).args(args).output().unwrap()
    }
}

fn chown_tree(path: &Path, uid: u32) {
    std::os::unix::fs::lchown(path, Some(uid), Some(uid)).unwrap();
    if fs::symlink_metadata(path).unwrap().is_dir() {
        for e in fs::read_dir(path).unwrap() {
            chown_tree(&e.unwrap().path(), uid);
        }
    }
}

/// Every path under `root` with its mode, sorted.
fn modes(root: &Path) -> Vec<(PathBuf, u32)> {
    let mut out = vec![(
        root.to_path_buf(),
        fs::symlink_metadata(root).unwrap().permissions().mode(),
    )];
    if fs::symlink_metadata(root).unwrap().is_dir() {
        for e in fs::read_dir(root).unwrap() {
            out.extend(modes(&e.unwrap().path()));
        }
    }
    out.sort();
    out
}

/// Every path under a state dir with its bytes (files) or nothing
/// (folders), leaving out the store's own files (compared by what the store
/// holds instead) and `LOCK` (each owner writes its PID there).
fn snapshot(root: &Path) -> Vec<(PathBuf, Option<Vec<u8>>)> {
    modes(root)
        .into_iter()
        .filter(|(p, _)| !p.starts_with(root.join("store")) && *p != root.join("LOCK"))
        .map(|(p, _)| {
            let bytes = fs::metadata(&p)
                .unwrap()
                .is_file()
                .then(|| fs::read(&p).unwrap());
            (p, bytes)
        })
        .collect()
}

/// Takes away write permission from everything under `root`; returns the
/// modes to give back.
fn make_read_only(root: &Path) -> Vec<(PathBuf, u32)> {
    let before = modes(root);
    for (p, m) in &before {
        fs::set_permissions(p, fs::Permissions::from_mode(m & !0o222)).unwrap();
    }
    before
}

fn give_back(modes: &[(PathBuf, u32)]) {
    for (p, m) in modes {
        fs::set_permissions(p, fs::Permissions::from_mode(*m)).unwrap();
    }
}

fn rows_stored(env: &Env) -> u64 {
    env.status_json()["summary"]["rows"].as_u64().unwrap()
}

/// Rows and batches in the store, as `status` reports them.
fn store_counts(status: &Output) -> (serde_json::Value, serde_json::Value) {
    let v: serde_json::Value = serde_json::from_str(&stdout(status)).unwrap();
    (
        v["summary"]["rows"].clone(),
        v["summary"]["batches"].clone(),
    )
}

fn plain_copy(env: &Env) -> PathBuf {
    let file = env.dir.path().join("plain.csv");
    fs::copy(data("good/plain.csv"), &file).unwrap();
    file
}

fn refused_write(out: &Output) -> String {
    let err = stderr(out);
    assert!(
        err.contains("Permission denied") || err.contains("Read-only file system"),
        "the cause is named: {err}"
    );
    assert!(!err.contains("panicked"), "{err}");
    err
}

#[test]
fn a_state_dir_that_cannot_be_written_refuses_ingest_and_changes_nothing() {
    let runner = Runner::new();
    let env = Env::new(&data("small.toml"));
    let file = plain_copy(&env);
    runner.hand_over(&env);
    // First the whole state dir, then only its archive (so the lock and the
    // store open, and the failure comes mid-intake).
    for (what, target) in [
        ("state dir", env.state()),
        ("archive", env.state().join("archive")),
    ] {
        let before = snapshot(&env.state());
        let rows = rows_stored(&env);
        let saved = make_read_only(&target);
        let out = runner.run(&env, &["ingest", file.to_str().unwrap()]);
        give_back(&saved);
        assert_eq!(code(&out), 1, "{what}: {}", stderr(&out));
        let err = refused_write(&out);
        assert!(
            err.contains(target.to_str().unwrap()),
            "{what}: the path is named: {err}"
        );
        // Nothing changed: every file under the state dir has the same
        // bytes, none was added or removed, and the input is where it was.
        assert_eq!(snapshot(&env.state()), before, "{what}: {err}");
        assert_eq!(rows_stored(&env), rows, "{what}");
        assert_eq!(
            fs::read(&file).unwrap(),
            fs::read(data("good/plain.csv")).unwrap()
        );
    }
    // With the permission back, the same command goes through.
    let out = runner.run(&env, &["ingest", file.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(rows_stored(&env) > 0);
    let out = runner.run(&env, &["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}

/// Polls `ok` every 20 ms until it holds, failing after `secs` seconds.
fn wait_for(secs: u64, what: &str, log: &Path, mut ok: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(secs);
    while !ok() {
        assert!(
            Instant::now() < deadline,
            "timed out waiting for {what}; daemon log:\n{}",
            fs::read_to_string(log).unwrap_or_default()
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

#[test]
fn an_inbox_file_the_daemon_cannot_read_stays_until_it_can() {
    let runner = Runner::new();
    let tmp = tempfile::tempdir().unwrap();
    let cfg = tmp.path().join("watch.toml");
    fs::write(
        &cfg,
        format!(
            "{}\n[daemon]\nsettle_seconds = 0.0\nrescan_seconds = 1.0\n",
            fs::read_to_string(data("small.toml")).unwrap()
        ),
    )
    .unwrap();
    let env = Env::new(&cfg);
    runner.hand_over(&env);
    let log = env.dir.path().join("watch.log");
    let mut child = runner
        .command(&env)
        .arg("watch")
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(fs::File::create(&log).unwrap())
        .spawn()
        .unwrap();
    struct Kill<'a>(&'a mut std::process::Child);
    impl Drop for Kill<'_> {
        fn drop(&mut self) {
            let _ = self.0.kill();
            let _ = self.0.wait();
        }
    }
    let guard = Kill(&mut child);
    wait_for(20, "the daemon to answer its own user", &log, || {
        let out = runner.run(&env, &["--json", "status"]);
        serde_json::from_str::<serde_json::Value>(&stdout(&out))
            .is_ok_and(|v| !v["daemon"].is_null())
    });
    if let Some(uid) = runner.uid {
        // Root gets past the socket's mode 0600, but the daemon checks the
        // peer's uid and refuses anyone but its own user.
        use std::io::{BufRead, Write};
        let mut s =
            std::os::unix::net::UnixStream::connect(env.state().join("control.sock")).unwrap();
        // The refusal comes before the request is read, so the daemon may
        // have closed its end already: a failed write is no failure here.
        let _ = s.write_all(
            b"{\"v\":1,\"user\":\"root\",\"json\":true,\"request\":{\"op\":\"verify\"}}\n",
        );
        let mut line = String::new();
        std::io::BufReader::new(s).read_line(&mut line).unwrap();
        let answer: serde_json::Value = serde_json::from_str(&line).unwrap();
        // Its own exit code, not the 75 of a busy state dir.
        assert_eq!(answer["exit"], 77, "{answer}");
        let error = answer["error"].as_str().unwrap_or_default();
        assert!(
            error.contains("refused") && error.contains(&format!("uid {uid}")),
            "{answer}"
        );
    }
    // Published the usual way, but with no read permission for anyone.
    let inbox = env.state().join("inbox");
    let staged = inbox.join(".tmp/locked.csv");
    fs::copy(data("good/plain.csv"), &staged).unwrap();
    if let Some(uid) = runner.uid {
        std::os::unix::fs::chown(&staged, Some(uid), Some(uid)).unwrap();
    }
    fs::set_permissions(&staged, fs::Permissions::from_mode(0o000)).unwrap();
    let published = inbox.join("locked.csv");
    fs::rename(&staged, &published).unwrap();
    wait_for(20, "the daemon to report the unreadable file", &log, || {
        fs::read_to_string(&log)
            .unwrap_or_default()
            .contains("locked.csv: cannot be taken")
    });
    let text = fs::read_to_string(&log).unwrap();
    let line = text
        .lines()
        .find(|l| l.contains("locked.csv: cannot be taken"))
        .unwrap();
    assert!(line.contains(published.to_str().unwrap()), "{line}");
    assert!(line.contains("Permission denied"), "{line}");
    // Not lost, not refused as bad data, nothing logged or stored.
    assert!(published.exists());
    assert_eq!(
        fs::read_dir(env.state().join("refused")).unwrap().count(),
        0,
        "set aside as refused"
    );
    assert!(
        env.log_json(&["--kind", "batch-refused,batch-accepted"])
            .is_empty()
    );
    // Readable again: taken on the next look, without a restart.
    fs::set_permissions(&published, fs::Permissions::from_mode(0o644)).unwrap();
    wait_for(20, "the file to be taken", &log, || !published.exists());
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    assert_eq!(accepted.len(), 1, "{accepted:?}");
    assert_eq!(accepted[0]["file"], "locked.csv");
    // SIGTERM: a clean stop.
    // SAFETY: kill(2) on our own child's pid.
    assert_eq!(
        unsafe { libc::kill(i32::try_from(guard.0.id()).unwrap(), libc::SIGTERM) },
        0
    );
    let status = guard.0.wait().unwrap();
    assert_eq!(
        status.code(),
        Some(0),
        "{}",
        fs::read_to_string(&log).unwrap()
    );
    drop(guard);
    let out = runner.run(&env, &["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}

/// A tmpfs of `bytes` mounted on a fresh dir; unmounted on drop.
struct Tmpfs {
    dir: tempfile::TempDir,
}

impl Tmpfs {
    fn mount(bytes: u64) -> Result<Tmpfs, String> {
        if !is_root() {
            return Err("not running as root".into());
        }
        let dir = tempfile::tempdir().unwrap();
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={bytes}"), "tmpfs"])
            .arg(dir.path())
            .output()
            .map_err(|e| format!("cannot run mount: {e}"))?;
        if !out.status.success() {
            return Err(format!("mount failed: {}", stderr(&out).trim()));
        }
        Ok(Tmpfs { dir })
    }

    fn path(&self) -> &Path {
        self.dir.path()
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(self.dir.path()).status();
    }
}

#[test]
fn a_full_disk_refuses_ingest_cleanly_and_the_file_goes_in_once_there_is_room() {
    let fs_ = match Tmpfs::mount(8 << 20) {
        Ok(t) => t,
        Err(why) => {
            println!(
                "skipped: no small tmpfs for a full disk ({why}); the enospc failpoints cover it"
            );
            return;
        }
    };
    let tmp = tempfile::tempdir().unwrap();
    let cfg = tmp.path().join("big.toml");
    fs::write(
        &cfg,
        fs::read_to_string(data("small.toml"))
            .unwrap()
            .replace("max_file_bytes = 4096", "max_file_bytes = 4194304"),
    )
    .unwrap();
    let state = fs_.path().join("state");
    let run = |args: &[&str]| -> Output {
        Command::new(env!("CARGO_BIN_EXE_tidegate"))
            .arg("--state")
            .arg(&state)
            .env_remove("TIDEGATE_STATE")
            .env_remove("TIDEGATE_FAILPOINTS")
            .env("USER", "tester")
            .env("NO_COLOR", "1")
            .args(args)
            .output()
            .unwrap()
    };
    let out = run(&["--config", cfg.to_str().unwrap(), "init"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    // A first file goes in, so the store has its files and a batch.
    let small = tmp.path().join("small.csv");
    fs::copy(data("good/plain.csv"), &small).unwrap();
    assert_eq!(code(&run(&["ingest", small.to_str().unwrap()])), 0);
    // A file of about 1 MB, and a filler that leaves less room than that.
    let big = tmp.path().join("big.csv");
    let mut text = String::from("id,city,temp,flag,y\n");
    let mut id = 0;
    while text.len() < 1 << 20 {
        text.push_str(&format!("{id},Oslo,{}.5,x,{}.25\n", id % 50, id % 7));
        id += 1;
    }
    fs::write(&big, &text).unwrap();
    let free = |p: &Path| {
        let c = std::ffi::CString::new(p.to_str().unwrap()).unwrap();
        // SAFETY: a valid C string and a zeroed statvfs to fill.
        let mut s: libc::statvfs = unsafe { std::mem::zeroed() };
        assert_eq!(unsafe { libc::statvfs(c.as_ptr(), &mut s) }, 0);
        s.f_bavail * s.f_frsize
    };
    let filler = fs_.path().join("filler");
    let room = 256 << 10;
    fs::write(&filler, vec![0u8; (free(fs_.path()) - room) as usize]).unwrap();
    let before = snapshot(&state);
    let rows = run(&["--json", "status"]);
    let out = run(&["ingest", big.to_str().unwrap()]);
    let err = stderr(&out);
    assert_eq!(code(&out), 1, "{err}");
    assert!(err.contains("No space left on device"), "{err}");
    assert!(
        err.contains(state.to_str().unwrap()),
        "names the path: {err}"
    );
    assert!(!err.contains("panicked"), "{err}");
    assert_eq!(snapshot(&state), before, "nothing left behind: {err}");
    assert_eq!(
        store_counts(&run(&["--json", "status"])),
        store_counts(&rows)
    );
    // Room again: the same command takes the file, and verify passes.
    fs::remove_file(&filler).unwrap();
    let out = run(&["ingest", big.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}
