//! The control socket's protocol: one JSON line from the client, one JSON
//! line back, then the connection closes.
//!
//! ```text
//! → {"v":2,"user":"ana","json":false,"request":{"op":"rollback","to":null,"reason":"complaints"}}
//! ← {"exit":0,"stdout":"rolled back to m000003 …\n","error":null,"note":null,"status":null}
//! ```
//!
//! A command answered by the daemon prints `stdout` and `error` exactly as
//! it would have when run directly, and exits with `exit`. `ping` is
//! answered from the daemon's last published status, never waiting for the
//! loop, so it returns at once even while a cycle trains.

use std::io::{BufRead, Write};
use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use crate::ids::{BatchId, ModelId};

/// Version of this protocol; a daemon refuses other versions by name.
/// 2 added `set-aside` and `bring-back`.
pub const VERSION: u32 = 2;

/// Longest request line accepted (a long `ingest` list still fits).
pub const MAX_REQUEST_BYTES: u64 = 1 << 20;

/// What a client asks the daemon to do.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "op", rename_all = "kebab-case", deny_unknown_fields)]
pub enum Request {
    /// Is a daemon there, and what is it doing?
    Ping,
    /// Take these files (relative names are read from `cwd`, the client's folder).
    Ingest {
        cwd: PathBuf,
        files: Vec<PathBuf>,
    },
    /// Run one cycle now.
    Retrain {
        cold: bool,
        dry_run: bool,
    },
    Rollback {
        to: Option<ModelId>,
        reason: String,
    },
    Approve {
        model: ModelId,
        reason: String,
    },
    Decline {
        model: ModelId,
        reason: String,
    },
    /// Keep a stored batch out of training, holdout, baselines and drift.
    SetAside {
        batch: BatchId,
        reason: String,
    },
    /// Put a batch that was set aside back into use.
    BringBack {
        batch: BatchId,
        reason: String,
    },
    /// Check the audit chain, the store, the archive and the checkpoints
    /// (it needs the open store, which the daemon holds).
    Verify,
    /// Write a consistent copy of the state dir to `out` (an absolute path).
    Backup {
        out: PathBuf,
    },
}

impl Request {
    /// The command name, for messages.
    pub fn name(&self) -> &'static str {
        match self {
            Request::Ping => "ping",
            Request::Ingest { .. } => "ingest",
            Request::Retrain { .. } => "retrain",
            Request::Rollback { .. } => "rollback",
            Request::Approve { .. } => "approve",
            Request::Decline { .. } => "decline",
            Request::SetAside { .. } => "set-aside",
            Request::BringBack { .. } => "bring-back",
            Request::Verify => "verify",
            Request::Backup { .. } => "backup",
        }
    }
}

/// A request with who sent it and how the answer should be rendered.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Envelope {
    pub v: u32,
    /// The acting user, for the audit log (the peer's uid is checked to be ours).
    pub user: String,
    /// Render data as JSON (the client's `--json`).
    pub json: bool,
    pub request: Request,
}

/// The daemon's answer.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Answer {
    /// The exit code the command ends with.
    pub exit: u8,
    /// What the command prints on stdout.
    #[serde(default)]
    pub stdout: String,
    /// The failure, printed as `error: …` on stderr.
    #[serde(default)]
    pub error: Option<String>,
    /// Something the user should know about how it was handled (stderr).
    #[serde(default)]
    pub note: Option<String>,
    /// The daemon's state, in answer to `ping`.
    #[serde(default)]
    pub status: Option<DaemonStatus>,
}

impl Answer {
    pub fn failed(exit: u8, error: impl Into<String>) -> Answer {
        Answer {
            exit,
            error: Some(error.into()),
            ..Answer::default()
        }
    }
}

/// What the daemon is doing, as published by its loop.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct DaemonStatus {
    pub pid: u32,
    pub version: String,
    pub started_at: String,
    /// "starting", "idle", "training" or "stopping".
    pub activity: String,
    /// The cycle being trained, what started it and since when.
    pub cycle: Option<u64>,
    pub cycle_reason: Option<String>,
    pub cycle_started_at: Option<String>,
    /// Latest progress of a training candidate, in words.
    pub progress: Option<String>,
    /// Accepted rows that no cycle has trained on yet.
    pub untrained_rows: u64,
    pub min_new_rows: u64,
    pub train_at: Option<String>,
    /// Commands waiting for the running cycle to end.
    pub waiting_requests: usize,
    /// Inbox files seen but not yet settled or taken.
    pub inbox_files: usize,
    pub inbox: PathBuf,
}

/// Why a line could not be read as a request or answer.
#[derive(Debug, thiserror::Error)]
pub enum FrameError {
    #[error("connection failed: {0}")]
    Io(#[from] std::io::Error),
    #[error("the other side closed the connection without a message")]
    Closed,
    #[error("message longer than {MAX_REQUEST_BYTES} bytes")]
    TooLong,
    #[error("not a valid message: {0}")]
    Json(#[from] serde_json::Error),
}

/// Reads one newline-terminated JSON message of at most `limit` bytes.
pub fn read_message<T: for<'de> Deserialize<'de>>(
    reader: impl BufRead,
    limit: u64,
) -> Result<T, FrameError> {
    let mut line = Vec::new();
    let mut limited = std::io::Read::take(reader, limit + 1);
    limited.read_until(b'\n', &mut line)?;
    if line.is_empty() {
        return Err(FrameError::Closed);
    }
    if line.len() as u64 > limit {
        return Err(FrameError::TooLong);
    }
    Ok(serde_json::from_slice(&line)?)
}

/// Writes one message as a JSON line.
pub fn write_message<T: Serialize>(mut writer: impl Write, message: &T) -> std::io::Result<()> {
    let mut line = serde_json::to_vec(message).map_err(std::io::Error::other)?;
    line.push(b'\n');
    writer.write_all(&line)?;
    writer.flush()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn requests_round_trip_as_one_line() {
        let env = Envelope {
            v: VERSION,
            user: "ana".into(),
            json: true,
            request: Request::Rollback {
                to: Some(ModelId(3)),
                reason: "complaints".into(),
            },
        };
        let mut buf = Vec::new();
        write_message(&mut buf, &env).unwrap();
        assert_eq!(buf.iter().filter(|&&b| b == b'\n').count(), 1);
        let text = String::from_utf8(buf.clone()).unwrap();
        assert!(text.contains(r#""op":"rollback""#), "{text}");
        let back: Envelope = read_message(&buf[..], MAX_REQUEST_BYTES).unwrap();
        assert_eq!(back, env);
    }

    #[test]
    fn bad_frames_are_errors_not_panics() {
        let empty: Result<Envelope, _> = read_message(&b""[..], 100);
        assert!(matches!(empty, Err(FrameError::Closed)));
        let long: Result<Envelope, _> = read_message(&[b'x'; 200][..], 100);
        assert!(matches!(long, Err(FrameError::TooLong)));
        let unknown: Result<Envelope, _> = read_message(
            &br#"{"v":1,"user":"a","json":false,"request":{"op":"format-disk"}}"#[..],
            1000,
        );
        assert!(matches!(unknown, Err(FrameError::Json(_))));
    }
}
