//! A batch's records: its life cycle ([`BatchState`], the state machine the store's transitions enforce),
//! its outcome, the record kept per batch, and the audit record.

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use super::RECORD_VERSION;
use crate::policy::Decision;

/// A batch's place in its life cycle. Daemon verdicts end in `Accepted`, `Quarantined`, `Rejected` or
/// `Duplicate`; review decisions move quarantined batches on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BatchState {
    /// Recorded before the rename into `processing/`; no verdict yet.
    Claimed,
    /// The verdict ([`BatchRecord::outcome`]) is recorded; moving the file and writing the notice are
    /// pending (redone after a crash).
    Decided,
    /// In `accepted/`; its items are in the pool.
    Accepted,
    /// In `quarantine/`, waiting for a security reviewer.
    Quarantined,
    /// In `rejected/` (malformed or unsafe input); the reason is in [`BatchRecord::reject`].
    Rejected,
    /// In `rejected/`: the same vendor already delivered the same bytes ([`BatchRecord::duplicate_of`]).
    Duplicate,
    /// Released from quarantine by a reviewer; its (possibly edited) items are in the pool.
    Released,
    /// Rejected by a reviewer after quarantine.
    ReviewRejected,
    /// Pulled back out of the pool after acceptance or release.
    Withdrawn,
    /// The claimed file disappeared from `processing/` before a verdict (an operator removed it).
    Vanished,
}

impl BatchState {
    /// Stable snake_case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Claimed => "claimed",
            Self::Decided => "decided",
            Self::Accepted => "accepted",
            Self::Quarantined => "quarantined",
            Self::Rejected => "rejected",
            Self::Duplicate => "duplicate",
            Self::Released => "released",
            Self::ReviewRejected => "review_rejected",
            Self::Withdrawn => "withdrawn",
            Self::Vanished => "vanished",
        }
    }

    /// Whether the daemon has nothing left to do for a batch in this state.
    pub fn is_settled(self) -> bool {
        !matches!(self, Self::Claimed | Self::Decided)
    }
}

impl std::fmt::Display for BatchState {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The daemon's verdict on a batch.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    /// Into the pool; file to `accepted/`.
    Accepted,
    /// Held for review; file to `quarantine/`.
    Quarantined,
    /// Malformed or unsafe; file to `rejected/`.
    Rejected,
    /// Same vendor, same bytes as an earlier batch; file to `rejected/`.
    Duplicate,
}

impl Outcome {
    /// Stable snake_case name (also the metrics label value).
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Accepted => "accepted",
            Self::Quarantined => "quarantined",
            Self::Rejected => "rejected",
            Self::Duplicate => "duplicate",
        }
    }

    /// The terminal state a batch with this verdict reaches once filed.
    pub fn settled_state(self) -> BatchState {
        match self {
            Self::Accepted => BatchState::Accepted,
            Self::Quarantined => BatchState::Quarantined,
            Self::Rejected => BatchState::Rejected,
            Self::Duplicate => BatchState::Duplicate,
        }
    }

    /// The workspace folder the file ends in.
    pub fn folder(self) -> &'static str {
        match self {
            Self::Accepted => "accepted",
            Self::Quarantined => "quarantine",
            Self::Rejected | Self::Duplicate => "rejected",
        }
    }
}

/// Why a file was rejected without scoring.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RejectReason {
    /// Stable snake_case code (e.g. `not_regular_file`, `too_large`, `parse_error`, `unsafe_name`).
    pub code: String,
    /// Human-readable explanation (names file, row and column for parse errors).
    pub detail: String,
    /// 1-based data row, for parse errors.
    pub row: Option<usize>,
    /// Column name, for parse errors.
    pub column: Option<String>,
}

/// One suspicious item kept with the batch record (the full report is in the `assessments` tree for
/// quarantined batches).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Suspect {
    /// Item id as delivered.
    pub id: String,
    /// Given label (class name).
    pub label: String,
    /// Proposed label (class name).
    pub proposed_label: String,
    /// Suspicion in `[0, 1]` (a suspicion for review, not proof).
    pub suspicion: f64,
    /// Confidence in the proposed label.
    pub confidence: f64,
}

/// The engine's numbers for a scored batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BatchScores {
    /// Repair cost in `[0, 1]`.
    pub repair_cost: f64,
    /// Damage in nats.
    pub damage: f64,
    /// Whether the repair path reached the trusted-loss target.
    pub target_reached: bool,
    /// Whether every solve converged.
    pub converged: bool,
    /// Scoring wall time in seconds.
    pub score_seconds: f64,
    /// Items whose proposed label differs from the given one.
    pub flagged_items: usize,
}

/// A batch as the store knows it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BatchRecord {
    /// Record version.
    pub version: u32,
    /// Generated id (`b` + zero-padded number); also the stem of its file name in the workspace.
    pub id: String,
    /// The vendor folder it arrived in.
    pub vendor: String,
    /// The name it arrived under, escaped (vendor-controlled; never used as a path).
    pub original_name: String,
    /// The daemon's file name for it: `<id>.<ext>` (`ext` is `csv`, `jsonl` or `bin` for unusable input).
    pub file_name: String,
    /// Current state.
    pub state: BatchState,
    /// The daemon's verdict, once decided.
    pub outcome: Option<Outcome>,
    /// When the daemon first saw the file.
    pub discovered_at: DateTime<Utc>,
    /// When it was claimed.
    pub claimed_at: DateTime<Utc>,
    /// When the verdict was recorded.
    pub decided_at: Option<DateTime<Utc>>,
    /// When the file reached its folder and the notice was written.
    pub settled_at: Option<DateTime<Utc>>,
    /// SHA-256 of the bytes (hex), once read.
    pub sha256: Option<String>,
    /// Size in bytes, once read.
    pub bytes: Option<u64>,
    /// Number of items, once parsed.
    pub items: Option<usize>,
    /// Why it was rejected, for `Rejected`.
    pub reject: Option<RejectReason>,
    /// The earlier batch with the same bytes, for `Duplicate`.
    pub duplicate_of: Option<String>,
    /// Engine numbers, for scored batches.
    pub scores: Option<BatchScores>,
    /// The policy's decision, for scored batches.
    pub decision: Option<Decision>,
    /// The most suspicious items (flagged ones first, at most 200).
    pub suspects: Vec<Suspect>,
    /// Ids of trusted items the batch as delivered would have broken.
    pub broken_trusted: Vec<String>,
    /// Pool sequence number of its items, while they are in the pool.
    pub pool_seq: Option<u64>,
    /// Notice files written for it (names inside `notices/<vendor>/`).
    pub notices: Vec<String>,
    /// Review decisions' vendor notices, each stored in the same transaction as its decision and removed
    /// once its files are written: a crash in between cannot lose one (`review::finish_pending` sends
    /// them).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub pending_notices: Vec<crate::notice::Notice>,
    /// Flagged items of an accepted (or released) batch that did not enter the pool with their given
    /// label (see [`crate::policy::AdmissionSettings`]): held for review, entered with the proposed label,
    /// or dropped, and what a reviewer later decided.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub held: Vec<HeldItem>,
    /// Set when the batch, once accepted, was taken back out of the pool for review because a later
    /// batch of its vendor was held by a stream rule (see [`Recall`]).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub recalled: Option<Recall>,
    /// The items of an accepted batch picked for the experts' spot check, and their answers once given
    /// ([`crate::policy::spot`]).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spot_check: Option<SpotCheck>,
}

/// An accepted batch's spot check: the items sent to the experts (without the vendor's labels, which
/// they must not see) and, once given, their answers.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpotCheck {
    /// The items, hard ones first.
    pub items: Vec<SpotItem>,
    /// The experts' answers, once given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub answered: Option<SpotAnswers>,
}

/// One spot-checked item.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpotItem {
    /// Item id.
    pub id: String,
    /// Why it was picked.
    pub stratum: crate::policy::spot::Stratum,
    /// The vendor's label (never shown to the experts before they answer).
    pub label: String,
    /// Its features, in the workspace's feature order (the experts' file carries them; the trusted set
    /// takes them with the answer).
    pub features: Vec<f64>,
    /// The engine's suspicion of the vendor's label and its confidence in the proposed one (never shown to
    /// the experts; kept for the held item an answer that contradicts the label creates). 0 in records
    /// from before they were kept.
    #[serde(default)]
    pub suspicion: f64,
    /// See `suspicion`.
    #[serde(default)]
    pub confidence: f64,
}

/// The experts' answers to a spot check.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpotAnswers {
    /// Who answered.
    pub by: String,
    /// When the answers were recorded.
    pub at: DateTime<Utc>,
    /// The expert's label per item, in the order of [`SpotCheck::items`].
    pub labels: Vec<String>,
    /// How many differ from the vendor's.
    pub disagreed: usize,
    /// The chart that signalled on these answers, if one did.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub signal: Option<crate::policy::spot::Stratum>,
}

/// Why an accepted batch was taken back out of the pool and quarantined for review: a later batch of the
/// same vendor was held by a stream rule (`flagged_items_drift` or `labels_unlikely`), and this batch was
/// accepted while that rule's statistic was already above 0, where the change most likely began (see
/// [`crate::policy::ItemJudgement::recall`]). A suspicion for review, not proof.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Recall {
    /// The later batch whose hold reached back to this one.
    pub held_batch: String,
    /// The stream rules that fired on it (reason codes).
    pub rules: Vec<String>,
    /// How many of the vendor's accepted batches the hold reached back over.
    pub batches: u32,
    /// When the batch was recalled.
    pub at: DateTime<Utc>,
}

/// Where a flagged item of an accepted batch stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum HeldState {
    /// Out of the pool, waiting for a reviewer.
    Waiting,
    /// In the pool with its given label (a reviewer admitted it).
    Admitted,
    /// In the pool with the proposed label (by the `relabel` setting or a reviewer).
    AdmittedProposed,
    /// Out of the pool for good (by the `drop` setting or a reviewer).
    Dropped,
}

impl HeldState {
    /// Stable snake_case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Waiting => "waiting",
            Self::Admitted => "admitted",
            Self::AdmittedProposed => "admitted_proposed",
            Self::Dropped => "dropped",
        }
    }
}

/// A flagged item of an accepted batch that did not enter the pool as delivered.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeldItem {
    /// Item id as delivered.
    pub id: String,
    /// Given label.
    pub label: String,
    /// The engine's proposed label.
    pub proposed_label: String,
    /// Suspicion in `[0, 1]` (a suspicion for review, not proof).
    pub suspicion: f64,
    /// Confidence in the proposed label, in `[0, 1]`.
    pub confidence: f64,
    /// Where it stands.
    pub state: HeldState,
    /// Who put it there: `daemon` (the admission setting) or the reviewer.
    pub decided_by: String,
    /// Why it did not enter as delivered: flagged, or unsure (see [`crate::policy::unsure_items`]).
    #[serde(default)]
    pub why: HeldWhy,
}

/// Why an item of an accepted batch did not enter the pool as delivered.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum HeldWhy {
    /// The engine proposes another label (suspicion at or above the batch's flag line).
    #[default]
    Flagged,
    /// Not flagged, but among the batch's highest suspicions: the engine cannot vouch for its label.
    Unsure,
    /// Not flagged, but in doubt: its suspicion reaches `[admission] hold_suspicion`, below the batch's
    /// flag line (see [`crate::policy::doubtful_items`]).
    InDoubt,
    /// In the pool until the trusted-set experts answered its spot check with another label: it left the
    /// pool and waits for a reviewer (`proposed_label` is the experts' answer). Experts err too; a
    /// reviewer admits it with either label or drops it.
    ExpertDisagreed,
}

impl HeldWhy {
    /// Stable snake_case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Flagged => "flagged",
            Self::Unsure => "unsure",
            Self::InDoubt => "in_doubt",
            Self::ExpertDisagreed => "expert_disagreed",
        }
    }
}

impl BatchRecord {
    /// Held items still waiting for a reviewer.
    pub fn held_waiting(&self) -> usize {
        self.held
            .iter()
            .filter(|h| h.state == HeldState::Waiting)
            .count()
    }
}

impl BatchRecord {
    /// A fresh record in state `Claimed`.
    pub fn claimed(id: String, vendor: &str, original_name: String, file_name: String) -> Self {
        let now = Utc::now();
        Self {
            version: RECORD_VERSION,
            id,
            vendor: vendor.to_string(),
            original_name,
            file_name,
            state: BatchState::Claimed,
            outcome: None,
            discovered_at: now,
            claimed_at: now,
            decided_at: None,
            settled_at: None,
            sha256: None,
            bytes: None,
            items: None,
            reject: None,
            duplicate_of: None,
            scores: None,
            decision: None,
            suspects: Vec::new(),
            broken_trusted: Vec::new(),
            pool_seq: None,
            notices: Vec::new(),
            pending_notices: Vec::new(),
            held: Vec::new(),
            recalled: None,
            spot_check: None,
        }
    }
}

/// One entry of the append-only audit trail.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AuditRecord {
    /// Record version.
    pub version: u32,
    /// Position in the trail (monotonic, not contiguous); set by the store.
    pub seq: u64,
    /// When.
    pub at: DateTime<Utc>,
    /// Who: `daemon`, or the reviewer's name.
    pub actor: String,
    /// What, as a stable snake_case code: `verdict`, `filed`, `notice`, `release`, `reject`, `withdraw`,
    /// `trusted_add`, `trusted_remove`, `recovered`, ...
    pub action: String,
    /// The batch concerned, if any.
    pub batch_id: Option<String>,
    /// The vendor concerned, if any.
    pub vendor: Option<String>,
    /// The verdict or new state, if any (`accepted`, `quarantined`, ...).
    pub outcome: Option<String>,
    /// Why (the reviewer's reason, or the policy's reason codes).
    pub reason: Option<String>,
    /// Anything else worth keeping, as JSON.
    pub detail: serde_json::Value,
}

impl AuditRecord {
    /// A new record dated now; `seq` is assigned by the store.
    pub fn new(actor: &str, action: &str) -> Self {
        Self {
            version: RECORD_VERSION,
            seq: 0,
            at: Utc::now(),
            actor: actor.to_string(),
            action: action.to_string(),
            batch_id: None,
            vendor: None,
            outcome: None,
            reason: None,
            detail: serde_json::Value::Null,
        }
    }

    /// Set the batch and vendor.
    pub fn batch(mut self, batch_id: &str, vendor: &str) -> Self {
        self.batch_id = Some(batch_id.to_string());
        self.vendor = Some(vendor.to_string());
        self
    }

    /// Set the outcome.
    pub fn outcome(mut self, outcome: &str) -> Self {
        self.outcome = Some(outcome.to_string());
        self
    }

    /// Set the reason.
    pub fn reason(mut self, reason: impl Into<String>) -> Self {
        self.reason = Some(reason.into());
        self
    }

    /// Set the detail.
    pub fn detail(mut self, detail: serde_json::Value) -> Self {
        self.detail = detail;
        self
    }
}
