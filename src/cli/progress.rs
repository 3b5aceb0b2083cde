//! A one-line progress display on stderr for long one-shot commands, shown only when stderr is a
//! terminal (never in logs, pipes or CI output).

use std::io::{IsTerminal, Write};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Redraws `LABEL: DONE/TOTAL` on one line of stderr, at most ten times a second.
pub struct Progress {
    label: String,
    last: Mutex<Option<Instant>>,
    /// A line is drawn and not yet ended.
    open: Mutex<bool>,
}

impl Progress {
    /// A display for `label`, or `None` when stderr is not a terminal.
    pub fn on_terminal(label: &str) -> Option<Self> {
        std::io::stderr().is_terminal().then(|| Self {
            label: label.to_string(),
            last: Mutex::new(None),
            open: Mutex::new(false),
        })
    }

    /// Show `done` of `total`; the last step ends the line.
    pub fn show(&self, done: usize, total: usize) {
        let Ok(mut last) = self.last.lock() else {
            return;
        };
        let finished = done >= total;
        if !finished && last.is_some_and(|t| t.elapsed() < Duration::from_millis(100)) {
            return;
        }
        *last = Some(Instant::now());
        let mut err = std::io::stderr().lock();
        let _ = write!(err, "\r{}: {done}/{total}", self.label);
        if finished {
            let _ = writeln!(err);
        }
        let _ = err.flush();
        if let Ok(mut open) = self.open.lock() {
            *open = !finished;
        }
    }

    /// End a line left open (the work stopped short of its total, or failed), so that what follows
    /// starts on a line of its own.
    pub fn finish(&self) {
        if let Ok(mut open) = self.open.lock() {
            if *open {
                let _ = writeln!(std::io::stderr());
                *open = false;
            }
        }
    }
}

/// Run `work` while one line of stderr shows `label` and the seconds elapsed (redrawn five times a second,
/// erased when the work ends), when stderr is a terminal; elsewhere just run it. For one long step whose
/// own progress cannot be counted (the engine's scoring of one batch, which stops at its time budget).
pub fn with_elapsed<T>(label: &str, work: impl FnOnce() -> T) -> T {
    if !std::io::stderr().is_terminal() {
        return work();
    }
    let finished = AtomicBool::new(false);
    let started = Instant::now();
    std::thread::scope(|s| {
        let ticker = s.spawn(|| {
            while !finished.load(Ordering::SeqCst) {
                let mut err = std::io::stderr().lock();
                let _ = write!(err, "\r{label}: {:.1} s", started.elapsed().as_secs_f64());
                let _ = err.flush();
                drop(err);
                std::thread::park_timeout(Duration::from_millis(200));
            }
            // Back to the start of the line and erase it (ANSI "erase in line").
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[K");
            let _ = err.flush();
        });
        let out = work();
        finished.store(true, Ordering::SeqCst);
        ticker.thread().unpark();
        out
    })
}
