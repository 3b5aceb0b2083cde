//! labelweir's integration tests, compiled into one binary.
//!
//! Table of contents (one module per area; each test works in its own temporary directory):
//! - `util`       — shared helpers: temp workspaces, running the binary, waiting for verdicts.
//! - `engine`     — the label-repair engine against outside references and its own derivatives.
//! - `assess_cli` — the `labelweir assess` contract: output, exit codes, bad input.
//! - `calibration` — the clean level calibrated to the data (registry data, moderately accurate learner).
//! - `daemon`     — the watching daemon end to end: verdicts, folders, notices, audit, pool, hostile input.
//! - `crash`      — SIGKILL at random moments, restart, invariants.
//! - `policy`     — the verdict policy on the engine's output at a large pool (flagged share).
//! - `review`     — quarantine review, trusted-set upkeep, notices, audit through the binary.
//! - `harden`     — the daemon as a non-root service user under hostile vendors, crashes, handle pressure.
//! - `intake`     — a file still growing, a folder where batches go, notice modes, another delimiter.
//! - `alerting`   — alert rules, dashboard and service unit checked with the real tools.
//! - `ux`         — what reviewers and vendors read: safe releases, notices, the review page in a browser.

mod alerting;
mod assess_cli;
mod calibration;
mod crash;
mod daemon;
mod engine;
mod features;
mod harden;
mod intake;
mod policy;
mod recall;
mod review;
mod spot;
mod util;
mod ux;
