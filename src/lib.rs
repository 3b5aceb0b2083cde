//! labelweir guards a model's training pool against poisoned and systematically wrong labels.
//!
//! Vendors drop labeled batches into `inbox/<vendor>/`. Each batch is scored *through the learner* against a
//! small trusted set of expert-verified items, and gets one verdict: accepted into the pool, quarantined for
//! security review, or rejected as malformed. A flag is a suspicion for human review, not proof.
//!
//! # The path of a batch
//!
//! [`daemon`] is the composition root: it opens the [`workspace`] and the [`store`], then starts the
//! pipeline's threads. A batch then moves through the pipeline's stages, which hand over through types
//! of their own module, so no stage imports another:
//!
//! 1. **watch**: a filesystem event marks a vendor folder dirty (events are hints; rescans are the truth);
//! 2. **ingest**: the folder is listed, a ready file is claimed by an atomic rename into `processing/`,
//!    its bytes are read and hashed, and it is parsed with [`data`] against the workspace's schema;
//! 3. **score**: on the dedicated scoring thread, the engine in [`model`] (numerics only) scores the batch
//!    against the pool summary and the trusted set, and [`policy`] (pure) decides against the vendor's
//!    own history (median/MAD baseline, CUSUM for drift, absolute limits at cold start);
//! 4. **verdict** (pure) builds the decided record, the audit record and the pool entry; the scoring
//!    thread commits them in one flushed [`store`] transaction ([`store::batch`] holds the batch state
//!    machine);
//! 5. **file**: on the filing thread the bytes go to their terminal folder and the vendor gets a
//!    [`notice`]; every file is written by [`fsx`]'s one atomic write, every vendor string shown through
//!    [`text`]'s one unsafe-character rule.
//!
//! A person then reviews what was held: [`review`] (show, release, reject, withdraw, trusted-set upkeep,
//! re-scans), reached through the running daemon's [`admin`] socket or on the stopped store. Beside them:
//! [`config`] (every module's settings in one file) and [`scenario`] (the demo's fictional recycling
//! plant); [`eval`] measures the engine and the daemon from outside.
#![deny(missing_docs)]

pub mod admin;
pub mod config;
mod conn;
pub mod daemon;
pub mod data;
pub mod eval;
pub use pipeline::features;
pub mod fsx;
mod http;
mod metrics;
pub mod model;
pub mod notice;
mod pipeline;
pub mod policy;
pub mod review;
pub mod scenario;
pub mod store;
pub mod text;
pub mod workspace;

pub use pipeline::Observer;
