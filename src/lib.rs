//! labelweir guards a model's training pool against poisoned and systematically wrong labels.
//!
//! Vendors drop labeled batches into `inbox/<vendor>/`. Each batch is scored *through the learner* against a
//! small trusted set of expert-verified items, and gets one verdict: accepted into the pool, quarantined for
//! security review, or rejected as malformed. A flag is a suspicion for human review, not proof.
//!
//! # A batch's path through the modules
//!
//! 1. [`ingest`] notices a file (filesystem events are hints, rescans are the truth), claims it by an atomic
//!    rename into `processing/`, copies and hashes its bytes, and parses it with [`data`] against the
//!    workspace's feature schema.
//! 2. [`store`] records the batch and every state transition in the embedded sled store, flushed before the
//!    side effect it enables; the audit trail is append-only.
//! 3. [`scoring`] is the only boundary between the async runtime and CPU work: a dedicated worker thread fed
//!    by a bounded channel runs the engine in [`model`] (numerics only) against the pool summary.
//! 4. [`policy`] turns the batch's repair cost and damage into a verdict against the vendor's own history
//!    (median/MAD baseline, CUSUM for drift, absolute limits at cold start). It is pure.
//! 5. [`actions`] moves the file to its terminal folder, updates the pool, and writes vendor notices
//!    ([`notice`]).
//!
//! Beside them: [`metrics`] (the only module that knows Prometheus), [`http`] (`/metrics`, `/livez`,
//! `/readyz`), [`review`] and [`admin`] (quarantine review and trusted-set upkeep, through the running daemon
//! or the stopped store), [`config`], [`scenario`] (the demo's fictional recycling plant) and [`eval`] (the
//! attack benchmark).
#![deny(missing_docs)]

pub mod actions;
pub mod admin;
pub mod cli;
pub mod config;
pub mod daemon;
pub mod data;
pub mod eval;
pub mod http;
pub mod ingest;
pub mod metrics;
pub mod model;
pub mod notice;
pub mod policy;
pub mod review;
pub mod scenario;
pub mod scoring;
pub mod store;
