//! The CLI's side of the control socket: when a daemon owns the state dir,
//! commands that change state are sent to it and its answer is printed as
//! the command would have printed it.

use std::io::BufReader;
use std::os::unix::net::UnixStream;
use std::time::Duration;

use super::protocol::{self, Answer, DaemonStatus, Envelope, Request};
use crate::cli::Exit;
use crate::state::{self, StateDir};

/// Connects to the daemon of `state`, if one listens.
fn connect(state: &StateDir) -> anyhow::Result<Option<UnixStream>> {
    let path = state.control_socket();
    match UnixStream::connect(&path) {
        Ok(s) => Ok(Some(s)),
        // No socket, or one left by a daemon that died: nobody listens.
        Err(e)
            if matches!(
                e.kind(),
                std::io::ErrorKind::NotFound | std::io::ErrorKind::ConnectionRefused
            ) =>
        {
            Ok(None)
        }
        Err(e) => anyhow::bail!("cannot reach the daemon at {}: {e}", path.display()),
    }
}

fn exchange(
    stream: UnixStream,
    request: &Request,
    json: bool,
    timeout: Option<Duration>,
) -> anyhow::Result<Answer> {
    let envelope = Envelope {
        v: protocol::VERSION,
        user: state::current_user(),
        json,
        request: request.clone(),
    };
    stream.set_read_timeout(timeout)?;
    protocol::write_message(&stream, &envelope)?;
    protocol::read_message(BufReader::new(&stream), 64 << 20).map_err(|e| {
        anyhow::anyhow!(
            "no answer from the daemon ({e}); see `tidegate log` for whether `{}` was done",
            request.name()
        )
    })
}

/// Sends `request` to the running daemon and prints its answer. `None`
/// when no daemon runs (the caller then does the work itself).
pub fn route(state: &StateDir, request: &Request, json: bool) -> anyhow::Result<Option<Exit>> {
    let Some(stream) = connect(state)? else {
        return Ok(None);
    };
    tracing::debug!("sending {} to the daemon", request.name());
    let answer = exchange(stream, request, json, None)?;
    if let Some(note) = &answer.note {
        tracing::info!("{note}");
    }
    crate::cli::emit(&answer.stdout)?;
    if let Some(e) = &answer.error {
        eprintln!("error: {e}");
    }
    Ok(Some(exit_from(answer.exit)))
}

/// The running daemon's status, asked with a short timeout; `None` when
/// no daemon answers.
pub fn ping(state: &StateDir) -> Option<DaemonStatus> {
    let stream = connect(state).ok()??;
    exchange(stream, &Request::Ping, true, Some(Duration::from_secs(2)))
        .ok()?
        .status
}

fn exit_from(code: u8) -> Exit {
    match code {
        0 => Exit::Ok,
        2 => Exit::Usage,
        65 => Exit::BadData,
        75 => Exit::Busy,
        77 => Exit::Refused,
        78 => Exit::BadConfig,
        _ => Exit::Failure,
    }
}
