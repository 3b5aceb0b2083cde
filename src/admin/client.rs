//! The review commands' side of the admin socket.

use std::io::{BufRead, BufReader, Read, Write};
use std::os::unix::net::UnixStream as StdUnixStream;
use std::path::Path;

use super::{AdminError, Request, Response, CLIENT_TIMEOUT, MAX_REQUEST_BYTES};
use crate::review::ReviewError;
use crate::workspace::Workspace;

/// Send a request to the daemon of workspace `ws`. `Ok(None)` when no daemon listens (no socket file,
/// or a stale one); `Ok(Some(result))` with the operation's own success or failure otherwise.
pub fn call(
    ws: &Workspace,
    req: &Request,
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    call_at(&ws.admin_socket(), req)
}

/// [`call`] on an explicit socket path.
pub(crate) fn call_at(
    path: &Path,
    req: &Request,
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    let io = |source| AdminError::Io {
        path: path.display().to_string(),
        source,
    };
    let mut stream = match StdUnixStream::connect(path) {
        Ok(s) => s,
        Err(e)
            if matches!(
                e.kind(),
                std::io::ErrorKind::NotFound | std::io::ErrorKind::ConnectionRefused
            ) =>
        {
            return Ok(None)
        }
        Err(e) if e.kind() == std::io::ErrorKind::PermissionDenied => {
            return Err(AdminError::Denied(path.display().to_string()))
        }
        Err(e) => return Err(io(e)),
    };
    stream.set_read_timeout(Some(CLIENT_TIMEOUT)).map_err(io)?;
    let mut line = serde_json::to_vec(req).map_err(|e| AdminError::Protocol(e.to_string()))?;
    line.push(b'\n');
    stream.write_all(&line).map_err(io)?;
    let mut answer = Vec::new();
    BufReader::new(stream.take(MAX_REQUEST_BYTES as u64 * 4))
        .read_until(b'\n', &mut answer)
        .map_err(io)?;
    let r: Response =
        serde_json::from_slice(&answer).map_err(|e| AdminError::Protocol(e.to_string()))?;
    Ok(Some(match (r.ok, r.result, r.error) {
        (true, Some(v), _) => Ok(v),
        (_, _, Some(e)) => Err(ReviewError::from_kind(&e.kind, e.message)),
        _ => Err(ReviewError::Model("empty response".into())),
    }))
}

/// Whether `ws` has a daemon answering on its admin socket.
pub fn daemon_answers(ws: &Workspace) -> bool {
    matches!(call(ws, &Request::Ping), Ok(Some(Ok(_))))
}
