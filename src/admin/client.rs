//! The review commands' side of the admin socket.

use std::io::{BufRead, BufReader, Read};
use std::os::unix::net::UnixStream as StdUnixStream;
use std::path::Path;
use std::time::Duration;

use super::{
    client_timeout, AdminError, Progress, ProgressLine, Request, Response, CONNECT_TIMEOUT, DENIED,
    MAX_REQUEST_BYTES,
};
use crate::review::ReviewError;
use crate::workspace::Workspace;

/// Send a request to the daemon of workspace `ws`. `Ok(None)` when no daemon listens (no socket file,
/// or a stale one); `Ok(Some(result))` with the operation's own success or failure otherwise.
pub fn call(
    ws: &Workspace,
    req: &Request,
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    call_at(&ws.admin_socket(), req, &|_| {})
}

/// [`call`], giving each progress line the daemon sends before its answer to `on_progress` (only a
/// request that asks for progress gets any).
pub fn call_with_progress(
    ws: &Workspace,
    req: &Request,
    on_progress: &dyn Fn(Progress),
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    call_at(&ws.admin_socket(), req, on_progress)
}

/// [`call_with_progress`] on an explicit socket path.
pub(crate) fn call_at(
    path: &Path,
    req: &Request,
    on_progress: &dyn Fn(Progress),
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    let io = |source| AdminError::Io {
        path: path.display().to_string(),
        source,
    };
    let timeout = client_timeout();
    let timed_out = |limit: Duration| AdminError::Timeout {
        path: path.display().to_string(),
        secs: limit.as_secs(),
    };
    let mut stream = match connect(path) {
        None => return Err(timed_out(CONNECT_TIMEOUT)),
        Some(Ok(s)) => s,
        Some(Err(e))
            if matches!(
                e.kind(),
                std::io::ErrorKind::NotFound | std::io::ErrorKind::ConnectionRefused
            ) =>
        {
            return Ok(None)
        }
        Some(Err(e)) if e.kind() == std::io::ErrorKind::PermissionDenied => {
            return Err(AdminError::Denied(format!(
                "no permission to use the admin socket {}: ask for membership in the reviewer group ([admin] reviewer_group)",
                path.display()
            )))
        }
        Some(Err(e)) => return Err(io(e)),
    };
    stream.set_read_timeout(Some(timeout)).map_err(io)?;
    stream.set_write_timeout(Some(timeout)).map_err(io)?;
    let is_timeout = |e: &std::io::Error| {
        matches!(
            e.kind(),
            std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut
        )
    };
    let mut line = serde_json::to_vec(req).map_err(|e| AdminError::Protocol(e.to_string()))?;
    line.push(b'\n');
    if let Err(e) = send_all(&stream, &line) {
        return Err(if is_timeout(&e) {
            timed_out(timeout)
        } else {
            io(e)
        });
    }
    let mut reader = BufReader::new((&mut stream).take(MAX_REQUEST_BYTES as u64 * 4));
    let mut answer = Vec::new();
    loop {
        answer.clear();
        if let Err(e) = reader.read_until(b'\n', &mut answer) {
            return Err(if is_timeout(&e) {
                timed_out(timeout)
            } else {
                io(e)
            });
        }
        match serde_json::from_slice::<ProgressLine>(&answer) {
            Ok(p) => on_progress(p.progress),
            Err(_) => break,
        }
    }
    if answer.is_empty() {
        // The daemon took the request and went away (killed, or stopped) before answering: what it did
        // with the request is unknown here, and a decision may well have been committed.
        return Err(AdminError::NoAnswer(path.display().to_string()));
    }
    let r: Response =
        serde_json::from_slice(&answer).map_err(|e| AdminError::Protocol(e.to_string()))?;
    Ok(Some(match (r.ok, r.result, r.error) {
        (true, Some(v), _) => Ok(v),
        (_, _, Some(e)) if e.kind == DENIED => return Err(AdminError::Denied(e.message)),
        (_, _, Some(e)) => Err(ReviewError::from_kind(&e.kind, e.message)),
        _ => Err(ReviewError::Model("empty response".into())),
    }))
}

/// Connect within [`CONNECT_TIMEOUT`] (`None` when it did not: a full backlog makes `connect` wait).
fn connect(path: &Path) -> Option<std::io::Result<StdUnixStream>> {
    let (tx, rx) = std::sync::mpsc::channel();
    let p = path.to_path_buf();
    let spawned = std::thread::Builder::new()
        .name("labelweir-connect".into())
        .spawn(move || {
            let _ = tx.send(StdUnixStream::connect(&p));
        });
    if let Err(e) = spawned {
        return Some(Err(e));
    }
    rx.recv_timeout(CONNECT_TIMEOUT).ok()
}

/// Write all of `buf` with `MSG_NOSIGNAL`: a daemon that closed the connection gives an error here, never
/// a SIGPIPE (which the commands leave at its default so that `| head` ends them quietly).
fn send_all(stream: &StdUnixStream, mut buf: &[u8]) -> std::io::Result<()> {
    while !buf.is_empty() {
        match rustix::net::send(stream, buf, rustix::net::SendFlags::NOSIGNAL) {
            Ok(0) => return Err(std::io::ErrorKind::WriteZero.into()),
            Ok(n) => buf = &buf[n..],
            Err(e) if e == rustix::io::Errno::INTR => {}
            Err(e) => return Err(e.into()),
        }
    }
    Ok(())
}

/// Whether `ws` has a daemon answering on its admin socket.
pub fn daemon_answers(ws: &Workspace) -> bool {
    matches!(call(ws, &Request::Ping), Ok(Some(Ok(_))))
}
