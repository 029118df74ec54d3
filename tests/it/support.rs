//! Shared helpers: run the real binary against a temp state dir.

use std::path::{Path, PathBuf};
use std::process::Output;

pub fn data(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data")
        .join(rel)
}

pub fn repo(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(rel)
}

/// A temp dir with a state dir inside, created from `config`.
pub struct Env {
    pub dir: tempfile::TempDir,
}

impl Env {
    pub fn new(config: &Path) -> Env {
        let env = Env {
            dir: tempfile::tempdir().unwrap(),
        };
        let out = env.run_with_config(config, &["init"]);
        assert!(
            out.status.success(),
            "init failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        env
    }

    pub fn state(&self) -> PathBuf {
        self.dir.path().join("state")
    }

    pub fn command(&self) -> std::process::Command {
        let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"));
        c.arg("--state")
            .arg(self.state())
            .env_remove("TIDEGATE_STATE")
            .env("USER", "tester")
            .env("NO_COLOR", "1");
        c
    }

    pub fn run(&self, args: &[&str]) -> Output {
        self.command().args(args).output().unwrap()
    }

    pub fn run_with_config(&self, config: &Path, args: &[&str]) -> Output {
        self.command()
            .arg("--config")
            .arg(config)
            .args(args)
            .output()
            .unwrap()
    }

    pub fn ingest(&self, files: &[PathBuf]) -> Output {
        self.command().arg("ingest").args(files).output().unwrap()
    }

    /// The audit log as parsed JSON lines.
    pub fn log_json(&self, args: &[&str]) -> Vec<serde_json::Value> {
        let mut a = vec!["--json", "log"];
        a.extend_from_slice(args);
        let out = self.run(&a);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        stdout(&out)
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    }

    pub fn status_json(&self) -> serde_json::Value {
        let out = self.run(&["--json", "status"]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_str(&stdout(&out)).unwrap()
    }
}

pub fn stdout(out: &Output) -> String {
    String::from_utf8_lossy(&out.stdout).into_owned()
}

pub fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).into_owned()
}

pub fn code(out: &Output) -> i32 {
    out.status.code().unwrap_or(-1)
}

/// Kills for a crash test: `TIDEGATE_SOAK_KILLS` when set (long runs, see
/// `ops/crash-soak.sh`), else the short default CI runs.
pub fn soak_kills(default: usize) -> usize {
    match std::env::var("TIDEGATE_SOAK_KILLS") {
        Ok(v) => v
            .trim()
            .parse()
            .unwrap_or_else(|_| panic!("TIDEGATE_SOAK_KILLS={v:?} is not a count")),
        Err(_) => default,
    }
}
