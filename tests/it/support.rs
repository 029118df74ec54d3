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

    /// Runs a command that must be refused: exit code `exit`, and `needle`
    /// in what it printed on stderr.
    pub fn refused(&self, args: &[&str], exit: i32, needle: &str) -> Output {
        let out = self.run(args);
        assert_eq!(code(&out), exit, "{args:?}: {}", stderr(&out));
        assert!(stderr(&out).contains(needle), "{args:?}: {}", stderr(&out));
        out
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

/// Config of a small regression state: one number column with no `max`
/// (`count`), one with bounds, a category, a quick network.
pub const TINY_CONFIG: &str = r#"[data]
target = "y"
task = "regression"
holdout_fraction = 0.25

[[data.columns]]
name = "count"
kind = "number"
min = 0

[[data.columns]]
name = "temp"
kind = "number"
min = -50
max = 60

[[data.columns]]
name = "town"
kind = "category"

[[data.columns]]
name = "y"
kind = "number"

[model]
hidden = [8]

[training]
cold_epochs = 300
warm_epochs = 5
learning_rate = 0.01

[gate]
min_holdout_rows = 50
"#;

/// `n` rows of the tiny schema, numbered from `from`; y depends on every input.
pub fn tiny_rows(from: usize, n: usize) -> String {
    let mut s = String::from("count,temp,town,y\n");
    for i in from..from + n {
        // Small counts (std about 0.14): a huge one overflows f32 once standardised.
        let count = ((i * 7919) % 50) as f64 / 100.0;
        let temp = ((i * 104_729) % 400) as f64 / 10.0 - 10.0;
        let town = ["Arden", "Bexley", "Corrin"][i % 3];
        let y = 300.0 * count + 0.5 * temp + [0.0, 10.0, 20.0][i % 3];
        s.push_str(&format!("{count},{temp},{town},{y}\n"));
    }
    s
}

impl Env {
    /// A state dir created from `config` (written into the temp dir).
    pub fn with_config_text(config: &str) -> Env {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("tidegate.toml");
        std::fs::write(&path, config).unwrap();
        let env = Env { dir };
        let out = env.run_with_config(&path, &["init"]);
        assert!(out.status.success(), "init failed: {}", stderr(&out));
        env
    }

    /// A tiny state with 600 rows in three batches and a serving model (the
    /// first cycle must beat the trivial predictor on this plain linear
    /// truth; the gate needs holdout rows from three batches).
    pub fn tiny_with_model() -> Env {
        Env::tiny_with_model_and("")
    }

    /// `tiny_with_model` with `extra` appended to the config (more sections).
    pub fn tiny_with_model_and(extra: &str) -> Env {
        let env = Env::with_config_text(&format!("{TINY_CONFIG}\n{extra}"));
        let files: Vec<_> = (0..3)
            .map(|i| {
                let file = env.dir.path().join(format!("rows-{i}.csv"));
                std::fs::write(&file, tiny_rows(i * 200, 200)).unwrap();
                file
            })
            .collect();
        let out = env.ingest(&files);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        let out = env.run(&["retrain"]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        assert!(
            !env.status_json()["summary"]["serving"].is_null(),
            "the first model was not promoted: {}",
            stdout(&out)
        );
        env
    }
}
