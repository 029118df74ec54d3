//! The control socket `state/control.sock`: mode 0600, peers with another
//! uid refused (SO_PEERCRED, exit 77), one request and one answer per
//! connection. The acting user written to the audit log is the account
//! name of the peer's uid, not the name the client sends.
//!
//! `ping` is answered here from the published status, so it never waits
//! for the loop. Every other request becomes an `Event::Control` for the
//! loop; this connection's thread waits for its answer (a `retrain` can
//! take minutes) and writes it back.

use std::io::BufReader;
use std::os::fd::AsRawFd;
use std::os::unix::fs::PermissionsExt;
use std::os::unix::net::{UnixListener, UnixStream};
use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::mpsc::{self, Sender};
use std::time::Duration;

use super::event_loop::{Call, Event, Reply};
use super::metrics::Shared;
use super::protocol::{self, Answer, Envelope, Request};
use crate::cli::Exit;

/// Connections served at once; more are refused with an answer.
const MAX_CONNECTIONS: usize = 32;

/// Binds the socket. Call only while holding `LOCK`: a socket file left by
/// a daemon that died is removed first.
pub fn bind(path: &Path) -> anyhow::Result<UnixListener> {
    match std::fs::remove_file(path) {
        Ok(()) => tracing::debug!("removed a stale {}", path.display()),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
        Err(e) => anyhow::bail!("cannot remove the stale socket {}: {e}", path.display()),
    }
    let listener = UnixListener::bind(path).map_err(|e| {
        anyhow::anyhow!(
            "cannot create the control socket {}: {e} (a socket path must be under about 100 bytes: use a shorter --state path)",
            path.display()
        )
    })?;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o600))
        .map_err(|e| anyhow::anyhow!("cannot restrict {} to mode 0600: {e}", path.display()))?;
    Ok(listener)
}

/// Accepts connections on a thread of its own, one thread per connection.
pub fn serve(listener: UnixListener, events: Sender<Event>, shared: Shared) -> std::io::Result<()> {
    let open = Arc::new(AtomicUsize::new(0));
    std::thread::Builder::new()
        .name("control".into())
        .spawn(move || {
            for stream in listener.incoming() {
                let Ok(stream) = stream else { continue };
                if open.fetch_add(1, Ordering::SeqCst) >= MAX_CONNECTIONS {
                    open.fetch_sub(1, Ordering::SeqCst);
                    let _ = protocol::write_message(
                        &stream,
                        &Answer::failed(
                            Exit::Busy as u8,
                            "the daemon is serving too many commands at once; try again",
                        ),
                    );
                    continue;
                }
                let (events, shared, open) = (events.clone(), shared.clone(), open.clone());
                let spawned = std::thread::Builder::new()
                    .name("control-conn".into())
                    .spawn(move || {
                        connection(&stream, &events, &shared);
                        open.fetch_sub(1, Ordering::SeqCst);
                    });
                if spawned.is_err() {
                    tracing::warn!("cannot start a thread for a control connection");
                }
            }
        })?;
    Ok(())
}

fn connection(stream: &UnixStream, events: &Sender<Event>, shared: &Shared) {
    let answer = answer_for(stream, events, shared);
    if let Err(e) = protocol::write_message(stream, &answer) {
        tracing::debug!("control client went away before its answer: {e}");
    }
}

fn answer_for(stream: &UnixStream, events: &Sender<Event>, shared: &Shared) -> Answer {
    let ours = current_uid();
    let peer = match peer_uid(stream) {
        Ok(uid) if uid == ours => uid,
        Ok(uid) => {
            tracing::warn!("refused a control connection from uid {uid}");
            return Answer::failed(
                Exit::Refused as u8,
                format!(
                    "refused: the daemon runs as uid {ours} and only takes commands from that uid (you are {uid})"
                ),
            );
        }
        Err(e) => {
            return Answer::failed(Exit::Failure as u8, format!("cannot check the peer: {e}"));
        }
    };
    let _ = stream.set_read_timeout(Some(Duration::from_secs(5)));
    let _ = stream.set_write_timeout(Some(Duration::from_secs(10)));
    let mut envelope: Envelope =
        match protocol::read_message(BufReader::new(stream), protocol::MAX_REQUEST_BYTES) {
            Ok(e) => e,
            Err(e) => return Answer::failed(Exit::Usage as u8, format!("bad request: {e}")),
        };
    if envelope.v != protocol::VERSION {
        return Answer::failed(
            Exit::Usage as u8,
            format!(
                "the daemon speaks control protocol {} and the client {}; use the same tidegate build for both",
                protocol::VERSION,
                envelope.v
            ),
        );
    }
    // The client's own idea of its name ($USER) is not evidence; the
    // kernel's word on the peer's uid is.
    envelope.user = user_name(peer);
    if envelope.request == Request::Ping {
        return Answer {
            status: Some(shared.status()),
            ..Answer::default()
        };
    }
    let (tx, rx) = mpsc::channel();
    let call = Call {
        envelope,
        reply: Reply::new(move |a| {
            let _ = tx.send(a);
        }),
    };
    if events.send(Event::Control(call)).is_err() {
        return Answer::failed(Exit::Busy as u8, "the daemon is stopping; nothing was done");
    }
    rx.recv().unwrap_or_else(|_| {
        Answer::failed(
            Exit::Failure as u8,
            "the daemon stopped before answering; see `tidegate log` for what was done",
        )
    })
}

/// The effective uid of this process.
pub fn current_uid() -> u32 {
    // SAFETY: geteuid has no preconditions and cannot fail.
    unsafe { libc::geteuid() }
}

/// The account name of `uid` (getpwuid_r), or `uid N` when it has none.
pub fn user_name(uid: u32) -> String {
    let mut buf: Vec<libc::c_char> = vec![0; 1024];
    loop {
        // SAFETY: an all-zero passwd is a valid value of this plain C struct.
        let mut pwd: libc::passwd = unsafe { std::mem::zeroed() };
        let mut found: *mut libc::passwd = std::ptr::null_mut();
        // SAFETY: every pointer is to a live local of the size passed;
        // getpwuid_r writes only within them.
        let rc =
            unsafe { libc::getpwuid_r(uid, &mut pwd, buf.as_mut_ptr(), buf.len(), &mut found) };
        if rc == libc::ERANGE && buf.len() < 1 << 20 {
            buf.resize(buf.len() * 2, 0);
            continue;
        }
        if rc != 0 || found.is_null() || pwd.pw_name.is_null() {
            return format!("uid {uid}");
        }
        // SAFETY: on success pw_name points to a NUL-terminated string in `buf`.
        let name = unsafe { std::ffi::CStr::from_ptr(pwd.pw_name) };
        return name.to_string_lossy().into_owned();
    }
}

/// The uid of the process on the other end of a Unix socket.
pub fn peer_uid(stream: &UnixStream) -> std::io::Result<u32> {
    let mut cred = libc::ucred {
        pid: 0,
        uid: 0,
        gid: 0,
    };
    let mut len = std::mem::size_of::<libc::ucred>() as libc::socklen_t;
    // SAFETY: the buffer is a ucred of the size passed, and the descriptor
    // is a connected Unix socket owned by `stream` for the whole call.
    let rc = unsafe {
        libc::getsockopt(
            stream.as_raw_fd(),
            libc::SOL_SOCKET,
            libc::SO_PEERCRED,
            (&mut cred as *mut libc::ucred).cast::<libc::c_void>(),
            &mut len,
        )
    };
    if rc != 0 {
        return Err(std::io::Error::last_os_error());
    }
    Ok(cred.uid)
}
