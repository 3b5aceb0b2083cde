//! Connection limits shared by the HTTP endpoint and the admin socket, so that idle or hostile clients
//! cannot use up the daemon's file descriptors (which the store, the inbox and the notices need too).
//!
//! * **A cap**: a listener takes a slot (a semaphore permit) *before* it accepts, so at most `max`
//!   connections are open at once; clients beyond the cap wait in the kernel's listen backlog, where they
//!   hold no descriptor of ours. The cap is also kept below a share of the process's `RLIMIT_NOFILE`
//!   ([`fd_share`]), whatever the configuration says.
//! * **An idle timeout**: [`Idle`] fails a read or write that has made no progress for `idle`, so a
//!   connection that never sends its request (or never reads the answer) is closed and its slot freed.
//! * **Backoff on accept errors**: an accept that fails (EMFILE, ENFILE, ENOBUFS, ...) waits, doubling
//!   from 10 ms to 2 s, and logs once per episode instead of once per try ([`Backoff`]).

use std::future::Future;
use std::io;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::sync::{OwnedSemaphorePermit, Semaphore};
use tokio::time::Sleep;

/// The process's soft limit on open files, if it can be read.
pub fn nofile_limit() -> Option<u64> {
    rustix::process::getrlimit(rustix::process::Resource::Nofile).current
}

/// At most `configured`, and at most `1/divisor` of the open-file limit (at least 1): the share of the
/// process's descriptors one listener may hold.
pub fn fd_share(configured: usize, divisor: u64) -> usize {
    let share = nofile_limit().map_or(usize::MAX, |n| (n / divisor.max(1)) as usize);
    configured.min(share).max(1)
}

/// The slots of one listener.
#[derive(Clone, Debug)]
pub struct Slots(Arc<Semaphore>);

impl Slots {
    /// `max` slots.
    pub fn new(max: usize) -> Self {
        Self(Arc::new(Semaphore::new(max.max(1))))
    }

    /// Wait for a free slot. `None` only if the slots were closed (they never are).
    pub async fn take(&self) -> Option<OwnedSemaphorePermit> {
        self.0.clone().acquire_owned().await.ok()
    }

    /// Slots free now.
    #[cfg(test)]
    pub fn free(&self) -> usize {
        self.0.available_permits()
    }
}

/// Waits between failed accepts: 10 ms, doubling to 2 s; one warning per episode (and one every minute
/// while it lasts), one info line when accepting works again.
#[derive(Debug)]
pub struct Backoff {
    what: &'static str,
    delay: Duration,
    failures: u64,
    logged: Option<Instant>,
}

impl Backoff {
    /// For the listener named `what` (in log lines).
    pub fn new(what: &'static str) -> Self {
        Self {
            what,
            delay: Duration::ZERO,
            failures: 0,
            logged: None,
        }
    }

    /// The wait after the next failure (for tests of the schedule).
    pub fn next_delay(&self) -> Duration {
        (self.delay * 2).clamp(Duration::from_millis(10), Duration::from_secs(2))
    }

    /// An accept failed: log (rarely) and wait. Errors about the one connection (reset or aborted before
    /// it was accepted) do not wait.
    pub async fn failed(&mut self, e: &io::Error) {
        if matches!(
            e.kind(),
            io::ErrorKind::ConnectionAborted | io::ErrorKind::ConnectionReset
        ) {
            return;
        }
        self.failures += 1;
        self.delay = self.next_delay();
        if self
            .logged
            .is_none_or(|t| t.elapsed() >= Duration::from_secs(60))
        {
            self.logged = Some(Instant::now());
            tracing::warn!(listener = self.what, error = %e, failures = self.failures, "accept failed; backing off (out of file descriptors?)");
        }
        tokio::time::sleep(self.delay).await;
    }

    /// An accept succeeded: the episode, if any, is over.
    pub fn succeeded(&mut self) {
        if self.failures > 0 {
            tracing::info!(
                listener = self.what,
                failures = self.failures,
                "accepting connections again"
            );
        }
        self.failures = 0;
        self.delay = Duration::ZERO;
        self.logged = None;
    }
}

/// A connection with an idle timeout, holding its listener's slot until dropped.
pub struct Idle<S> {
    inner: S,
    idle: Duration,
    timer: Pin<Box<Sleep>>,
    _slot: Option<OwnedSemaphorePermit>,
}

impl<S> Idle<S> {
    /// Wrap `inner`: a read or write pending for longer than `idle` without progress fails with
    /// `TimedOut`.
    pub fn new(inner: S, idle: Duration, slot: Option<OwnedSemaphorePermit>) -> Self {
        Self {
            inner,
            idle,
            timer: Box::pin(tokio::time::sleep(idle)),
            _slot: slot,
        }
    }

    fn progress(&mut self) {
        let at = tokio::time::Instant::now() + self.idle;
        self.timer.as_mut().reset(at);
    }

    fn expired(&mut self, cx: &mut Context<'_>) -> bool {
        self.timer.as_mut().poll(cx).is_ready()
    }
}

fn timed_out() -> io::Error {
    io::Error::new(io::ErrorKind::TimedOut, "connection idle for too long")
}

impl<S: AsyncRead + Unpin> AsyncRead for Idle<S> {
    fn poll_read(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let this = self.get_mut();
        match Pin::new(&mut this.inner).poll_read(cx, buf) {
            Poll::Ready(r) => {
                this.progress();
                Poll::Ready(r)
            }
            Poll::Pending if this.expired(cx) => Poll::Ready(Err(timed_out())),
            Poll::Pending => Poll::Pending,
        }
    }
}

impl<S: AsyncWrite + Unpin> AsyncWrite for Idle<S> {
    fn poll_write(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        let this = self.get_mut();
        match Pin::new(&mut this.inner).poll_write(cx, buf) {
            Poll::Ready(r) => {
                this.progress();
                Poll::Ready(r)
            }
            Poll::Pending if this.expired(cx) => Poll::Ready(Err(timed_out())),
            Poll::Pending => Poll::Pending,
        }
    }

    fn poll_flush(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        let this = self.get_mut();
        match Pin::new(&mut this.inner).poll_flush(cx) {
            Poll::Pending if this.expired(cx) => Poll::Ready(Err(timed_out())),
            other => other,
        }
    }

    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().inner).poll_shutdown(cx)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokio::io::{AsyncReadExt, AsyncWriteExt};

    #[test]
    fn backoff_doubles_from_10ms_to_2s() {
        let mut b = Backoff::new("test");
        let mut seen = Vec::new();
        for _ in 0..10 {
            b.delay = b.next_delay();
            seen.push(b.delay.as_millis());
        }
        assert_eq!(
            seen,
            [10, 20, 40, 80, 160, 320, 640, 1280, 2000, 2000],
            "doubling, capped at 2 s"
        );
        b.failures = 3;
        b.succeeded();
        assert_eq!(b.next_delay(), Duration::from_millis(10));
    }

    #[test]
    fn a_share_of_the_fd_limit_caps_the_configured_value() {
        let limit = nofile_limit().expect("RLIMIT_NOFILE is readable on Linux");
        assert_eq!(fd_share(usize::MAX, 4), (limit / 4).max(1) as usize);
        assert_eq!(fd_share(3, 4), 3.min((limit / 4) as usize).max(1));
        assert_eq!(fd_share(0, 4), 1, "at least one slot");
    }

    #[tokio::test]
    async fn an_idle_read_times_out_and_frees_its_slot() {
        let slots = Slots::new(1);
        let (a, mut b) = tokio::io::duplex(64);
        let permit = slots.take().await.unwrap();
        assert_eq!(slots.free(), 0);
        let mut conn = Idle::new(a, Duration::from_secs(1), Some(permit));
        // Progress resets the clock: five bytes 300 ms apart span more than the idle time.
        let reader = tokio::spawn(async move {
            let mut buf = [0u8; 1];
            for _ in 0..5 {
                conn.read_exact(&mut buf).await.unwrap();
            }
            let e = conn.read_exact(&mut buf).await.unwrap_err();
            (e.kind(), conn)
        });
        for _ in 0..5 {
            tokio::time::sleep(Duration::from_millis(300)).await;
            b.write_all(b"x").await.unwrap();
        }
        let (kind, conn) = reader.await.unwrap();
        assert_eq!(kind, io::ErrorKind::TimedOut);
        drop(conn);
        assert_eq!(slots.free(), 1, "dropping the connection frees the slot");
    }
}
