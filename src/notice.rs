//! Vendor notices: one notice per decided batch, written to `notices/<vendor>/`.
//!
//! * `<stem>.json` — the authoritative record, RFC 9457-style members (`type`, `title`, `detail`,
//!   `instance`) plus the batch's fields; its JSON Schema (2020-12) ships as `schemas/notice.schema.json`.
//! * `<stem>.md` — the same for people, every vendor-supplied string sanitised and escaped.
//! * `<stem>.items.csv` — optional: item ids and reason codes, safe to open in a spreadsheet (every cell
//!   quoted; cells that a spreadsheet would read as a formula neutralised with a leading `'`, per OWASP's
//!   "CSV Injection" guidance).
//!
//! The stem names the file the vendor delivered, then the batch id: `<file stem>.<batch id>` for the
//! first verdict on a batch (`accepted`, `quarantined`, `malformed`, `duplicate`) and
//! `<file stem>.<batch id>.<verdict>` for a later review decision (`released`, `rejected`, `withdrawn`), so
//! a quarantined batch's interim notice is never overwritten by its final one. The file stem keeps
//! `[A-Za-z0-9_-]` of the delivered name (other characters become `-`, at most 60). The stem is also the
//! notice's appeal reference: the review commands take it wherever they take a batch id.
//!
//! Every notice says what the vendor is expected to do next ([`NextStep`]): nothing, fix and resend, or
//! contact the plant (to appeal).
//!
//! What a notice discloses is configurable ([`NoticeSettings`]). By default it names the flagged items and
//! reason codes, but not scores or proposed labels, so that a poisoner cannot use notices as a free oracle.
//! [`write_notice`] applies the settings itself ([`Notice::redacted`]), whatever the caller put in.
//!
//! Every notice about scored content (accepted with flagged items, held, released, rejected, withdrawn)
//! says that a flag is a suspicion for review, not proof ([`SUSPICION_SENTENCE`]); a notice about a file
//! that could not be read, or a duplicate, does not: nothing was judged.

use std::io;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::policy::{Decision, ReasonCode, Verdict};
use crate::text::csv_cell;

/// Version of the notice record (the `schema_version` member). 2: file names after the delivered file,
/// `next_step`, `appeal`, item `row`, `suspicion_notice` only where it applies.
pub const NOTICE_SCHEMA_VERSION: u32 = 2;

/// The fixed sentence every notice carries.
pub const SUSPICION_SENTENCE: &str = "A flag is a suspicion for review, not proof: labelweir's scores point \
a human reviewer at batches and items worth checking; they do not establish that any label is wrong or that \
anyone acted in bad faith.";

/// The `[notices]` section of the configuration: what vendor notices contain.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct NoticeSettings {
    /// Include repair cost, suspicion scores and the policy's numbers. Default false (no free oracle).
    pub disclose_scores: bool,
    /// Include the labels the repair proposes for flagged items. Default false; a reviewer may still
    /// disclose them when rejecting a batch (`quarantine reject --disclose-proposed`).
    pub disclose_proposed_labels: bool,
    /// Write the Markdown rendering beside the JSON. Default true.
    pub markdown: bool,
    /// Write the CSV of item ids and reason codes beside the JSON. Default true.
    pub csv: bool,
    /// Most items listed in one notice (the count of all flagged items is always given). Default 1000.
    pub max_items: usize,
    /// Longest vendor-supplied string (file name, item id, label) shown in Markdown, in characters
    /// (longer ones are cut and marked with `…`). labelweir's own sentences are never cut. Default 120.
    pub max_string_chars: usize,
}

impl Default for NoticeSettings {
    fn default() -> Self {
        Self {
            disclose_scores: false,
            disclose_proposed_labels: false,
            markdown: true,
            csv: true,
            max_items: 1000,
            max_string_chars: 120,
        }
    }
}

/// What a notice reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum NoticeVerdict {
    /// The batch joined the training pool.
    Accepted,
    /// The batch is held for security review (interim; a review decision follows).
    Quarantined,
    /// The file could not be read as a batch (format, limits, file type); nothing was scored.
    Malformed,
    /// The same content was already delivered by this vendor.
    Duplicate,
    /// A reviewer released the held batch into the pool (possibly with items excluded or relabeled).
    Released,
    /// A reviewer rejected the held batch; it stays out of the pool.
    Rejected,
    /// A previously accepted batch was pulled back out of the pool after a re-check.
    Withdrawn,
    /// A previously accepted batch was taken back out of the pool, to be reviewed, because a later batch
    /// of the same vendor was held by a stream rule (the change most likely began before it).
    Recalled,
}

impl NoticeVerdict {
    /// Stable snake_case name.
    pub fn as_str(self) -> &'static str {
        match self {
            NoticeVerdict::Accepted => "accepted",
            NoticeVerdict::Quarantined => "quarantined",
            NoticeVerdict::Malformed => "malformed",
            NoticeVerdict::Duplicate => "duplicate",
            NoticeVerdict::Released => "released",
            NoticeVerdict::Rejected => "rejected",
            NoticeVerdict::Withdrawn => "withdrawn",
            NoticeVerdict::Recalled => "recalled",
        }
    }

    /// Whether this is a later decision on a batch that already had its first verdict — a review
    /// decision, or a recall — so its files get a `.<verdict>` suffix.
    pub fn is_review(self) -> bool {
        matches!(
            self,
            NoticeVerdict::Released
                | NoticeVerdict::Rejected
                | NoticeVerdict::Withdrawn
                | NoticeVerdict::Recalled
        )
    }

    fn title(self) -> &'static str {
        match self {
            NoticeVerdict::Accepted => "Batch accepted",
            NoticeVerdict::Quarantined => "Batch held for review",
            NoticeVerdict::Malformed => "Batch not readable",
            NoticeVerdict::Duplicate => "Batch already delivered",
            NoticeVerdict::Released => "Batch released after review",
            NoticeVerdict::Rejected => "Batch rejected after review",
            NoticeVerdict::Withdrawn => "Batch withdrawn from the training pool",
            NoticeVerdict::Recalled => "Accepted batch taken back for review",
        }
    }

    fn default_detail(self) -> &'static str {
        match self {
            NoticeVerdict::Accepted => "The batch was scored against the trusted items and joined the training pool.",
            NoticeVerdict::Quarantined => "The batch was scored against the trusted items and is held for review by a person before it can join the training pool. The notice gives the number of items flagged for review; a reviewer decides which items, if any, are named.",
            NoticeVerdict::Malformed => "The file could not be read as a batch, so it was not scored. The reasons say where the problem was; please fix it and deliver the batch again.",
            NoticeVerdict::Duplicate => "A file with exactly the same content was already delivered from this vendor folder; this copy was not processed again.",
            NoticeVerdict::Released => "After review, the batch joined the training pool. Items listed were excluded or relabeled by the reviewer.",
            NoticeVerdict::Rejected => "After review, the batch was rejected and will not join the training pool.",
            NoticeVerdict::Withdrawn => "After a re-check against an updated trusted set, this previously accepted batch was taken back out of the training pool pending review.",
            NoticeVerdict::Recalled => "This previously accepted batch was taken back out of the training pool and is held for review by a person: a later batch from this vendor was held by a check that looks across the vendor's recent items, and this batch was accepted after that check began to rise. This is a suspicion for review, not a finding about any item.",
        }
    }
}

/// Who took the decision.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DecidedBy {
    /// The automatic policy.
    Policy,
    /// A person (reviewers' names stay in the audit trail, not in notices).
    Reviewer,
}

/// One reason in a notice: a stable code and a sentence; for malformed files, where.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NoticeReason {
    /// Stable snake_case code (policy codes from [`ReasonCode`], or ingest/review codes).
    pub code: String,
    /// Human-readable detail.
    pub detail: String,
    /// 1-based row of the file the reason refers to, if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub row: Option<u64>,
    /// Column (name or 1-based number) the reason refers to, if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub column: Option<String>,
}

impl NoticeReason {
    /// A reason with a code and detail only.
    pub fn new(code: impl Into<String>, detail: impl Into<String>) -> Self {
        Self {
            code: code.into(),
            detail: detail.into(),
            row: None,
            column: None,
        }
    }
}

/// Item-level reason codes used in notices.
pub mod item_codes {
    /// The label repair moved this item's label: flagged for review (no finer finding recorded).
    pub const LABEL_SUSPECTED: &str = "label_suspected";
    /// The trusted items contradict the label: the repair moved it to reach the trusted items, or the
    /// learner fitted with the trusted items doubts it.
    pub const CONTRADICTS_TRUSTED: &str = "contradicts_trusted_items";
    /// Similar items elsewhere in the pool and batch carry another label (the reference model doubts it).
    pub const UNLIKE_SIMILAR: &str = "unlike_similar_items";
    /// A reviewer excluded the item before releasing the batch.
    pub const EXCLUDED_BY_REVIEWER: &str = "excluded_by_reviewer";
    /// A reviewer changed the item's label before releasing the batch.
    pub const RELABELED_BY_REVIEWER: &str = "relabeled_by_reviewer";
}

/// One item named in a notice.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NoticeItem {
    /// The item's id as the vendor delivered it (or its 1-based row number when the batch has no ids).
    pub id: String,
    /// The item's 1-based data row in the delivered file (the header is not a data row), when known.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub row: Option<u64>,
    /// Reason codes for this item.
    pub reasons: Vec<String>,
    /// The label the repair proposes (only when disclosed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub proposed_label: Option<String>,
    /// Suspicion in `[0, 1]` (only when scores are disclosed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub suspicion: Option<f64>,
}

/// What this notice discloses.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Disclosure {
    /// Scores (repair cost, suspicion) are included.
    pub scores: bool,
    /// Proposed labels are included.
    pub proposed_labels: bool,
    /// A reviewer chose to disclose the proposed labels for this decision (overrides the setting).
    pub by_reviewer: bool,
}

/// Identity and timestamps of the batch a notice is about.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchRef {
    /// Internal batch id (generated by the daemon; `[A-Za-z0-9_-]`).
    pub batch_id: String,
    /// Vendor (the inbox sub-folder the file arrived in).
    pub vendor: String,
    /// The file's name as delivered, if known (vendor-supplied: shown escaped).
    pub file_name: Option<String>,
    /// SHA-256 of the delivered bytes, lower-case hex, if the file could be read.
    pub sha256: Option<String>,
    /// When the daemon claimed the file.
    pub received_at: DateTime<Utc>,
    /// When this decision was taken.
    pub decided_at: DateTime<Utc>,
}

/// A vendor notice (the JSON record; see `schemas/notice.schema.json`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Notice {
    /// Record version ([`NOTICE_SCHEMA_VERSION`]).
    pub schema_version: u32,
    /// RFC 9457 `type`: a URI naming the kind of notice, `urn:labelweir:notice:<verdict>`.
    #[serde(rename = "type")]
    pub type_uri: String,
    /// RFC 9457 `title`: a short summary of the kind of notice.
    pub title: String,
    /// RFC 9457 `detail`: what happened to this batch.
    pub detail: String,
    /// RFC 9457 `instance`: a URI for this occurrence, `urn:labelweir:batch:<batch id>:<verdict>`.
    pub instance: String,
    /// The decision.
    pub verdict: NoticeVerdict,
    /// Who decided.
    pub decided_by: DecidedBy,
    /// Internal batch id.
    pub batch_id: String,
    /// Vendor.
    pub vendor: String,
    /// The file's name as delivered.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub file_name: Option<String>,
    /// SHA-256 of the delivered bytes (lower-case hex).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sha256: Option<String>,
    /// When the file was claimed (RFC 3339, UTC).
    #[serde(with = "rfc3339")]
    pub received_at: DateTime<Utc>,
    /// When this decision was taken (RFC 3339, UTC).
    #[serde(with = "rfc3339")]
    pub decided_at: DateTime<Utc>,
    /// Why.
    pub reasons: Vec<NoticeReason>,
    /// Items in the batch, if it was read.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub items_total: Option<u64>,
    /// Items named by this notice before any truncation.
    pub items_listed_total: u64,
    /// Whether `items` was cut to `max_items`.
    pub items_truncated: bool,
    /// Items named (flagged, excluded or relabeled).
    pub items: Vec<NoticeItem>,
    /// For a duplicate: the batch id of the first delivery.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub duplicate_of: Option<String>,
    /// Repair cost (only when scores are disclosed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub repair_cost: Option<f64>,
    /// What this notice discloses.
    pub disclosure: Disclosure,
    /// [`SUSPICION_SENTENCE`] where the notice is about scored content (absent for a malformed file or a
    /// duplicate: nothing was judged).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub suspicion_notice: Option<String>,
    /// What the vendor is expected to do next.
    #[serde(default)]
    pub next_step: NextStep,
    /// How to appeal or resubmit: the reference to quote.
    #[serde(default)]
    pub appeal: Appeal,
}

/// What a vendor is expected to do after a notice.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum NextAction {
    /// Nothing is expected.
    #[default]
    None,
    /// Correct the file and deliver it again under a new name.
    FixAndResend,
    /// Get in touch with the plant (e.g. to appeal).
    Contact,
}

impl NextAction {
    /// Stable snake_case name.
    pub fn as_str(self) -> &'static str {
        match self {
            NextAction::None => "none",
            NextAction::FixAndResend => "fix_and_resend",
            NextAction::Contact => "contact",
        }
    }
}

/// The next step for the vendor: an action code and a sentence.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct NextStep {
    /// What is expected.
    pub action: NextAction,
    /// The same in words.
    pub text: String,
}

/// How to appeal a decision or resubmit a batch.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Appeal {
    /// The reference to quote: this notice's file stem (the review commands accept it as a batch).
    pub reference: String,
    /// How, in words.
    pub text: String,
}

mod rfc3339 {
    use chrono::{DateTime, SecondsFormat, Utc};
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(t: &DateTime<Utc>, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&t.to_rfc3339_opts(SecondsFormat::Millis, true))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<DateTime<Utc>, D::Error> {
        let s = String::deserialize(d)?;
        DateTime::parse_from_rfc3339(&s)
            .map(|t| t.with_timezone(&Utc))
            .map_err(serde::de::Error::custom)
    }
}

impl Notice {
    /// A notice with the standard `type`, `title`, `detail` and `instance` for `verdict`, no reasons and
    /// no items.
    pub fn new(verdict: NoticeVerdict, decided_by: DecidedBy, batch: BatchRef) -> Self {
        Self {
            schema_version: NOTICE_SCHEMA_VERSION,
            type_uri: format!("urn:labelweir:notice:{}", verdict.as_str()),
            title: verdict.title().to_string(),
            detail: verdict.default_detail().to_string(),
            instance: format!(
                "urn:labelweir:batch:{}:{}",
                batch.batch_id,
                verdict.as_str()
            ),
            verdict,
            decided_by,
            batch_id: batch.batch_id,
            vendor: batch.vendor,
            file_name: batch.file_name,
            sha256: batch.sha256,
            received_at: batch.received_at,
            decided_at: batch.decided_at,
            reasons: Vec::new(),
            items_total: None,
            items_listed_total: 0,
            items_truncated: false,
            items: Vec::new(),
            duplicate_of: None,
            repair_cost: None,
            disclosure: Disclosure::default(),
            suspicion_notice: None,
            next_step: NextStep::default(),
            appeal: Appeal::default(),
        }
    }

    /// Whether the notice is about scored content, so the suspicion caution applies: not for a file that
    /// could not be read or a duplicate, nor for an accepted batch with nothing flagged.
    pub fn caution_applies(&self) -> bool {
        match self.verdict {
            NoticeVerdict::Malformed | NoticeVerdict::Duplicate => false,
            NoticeVerdict::Accepted => self.items_listed_total > 0,
            _ => true,
        }
    }

    /// The vendor's next step for this notice.
    pub fn next_step_for(&self) -> NextStep {
        let flagged = self.items_listed_total;
        let (action, text) = match self.verdict {
            NoticeVerdict::Accepted if flagged > 0 => (
                NextAction::None,
                format!("Nothing is required. The batch is in the training pool; {flagged} of its items wait for a reviewer's check, who may admit them or leave them out. If you find a mislabeled item yourself, deliver the corrected items as a new file."),
            ),
            NoticeVerdict::Accepted => (NextAction::None, "Nothing is required.".to_string()),
            NoticeVerdict::Quarantined => (
                NextAction::None,
                "Nothing is required yet. A reviewer decides; a second notice for this file follows with the outcome. Please do not resend the file meanwhile.".to_string(),
            ),
            NoticeVerdict::Malformed => (
                NextAction::FixAndResend,
                "Please fix the file where the reasons point and deliver it again under a new file name.".to_string(),
            ),
            NoticeVerdict::Duplicate => (
                NextAction::None,
                "Nothing is required: the first delivery stands. If you meant to send corrected labels, change the file and deliver it under a new name.".to_string(),
            ),
            NoticeVerdict::Released => (
                NextAction::None,
                "Nothing is required. Items listed were left out or relabeled by the reviewer; please check them against your own records for future batches.".to_string(),
            ),
            NoticeVerdict::Rejected => (
                NextAction::FixAndResend,
                "Please check the labels of this batch, correct them and deliver the corrected file under a new file name. If you believe the labels are right, contact the plant to appeal.".to_string(),
            ),
            NoticeVerdict::Withdrawn => (
                NextAction::Contact,
                "Please contact the plant: a reviewer will go through the batch with you.".to_string(),
            ),
            NoticeVerdict::Recalled => (
                NextAction::None,
                "Nothing is required yet. A reviewer decides; a further notice for this file follows with the outcome. Please do not resend the file meanwhile.".to_string(),
            ),
        };
        NextStep { action, text }
    }

    /// How to appeal or resubmit, quoting this notice's reference.
    pub fn appeal_for(&self) -> Appeal {
        let reference = self.file_stem();
        let text = match self.verdict {
            NoticeVerdict::Malformed | NoticeVerdict::Duplicate => format!(
                "Questions about this notice: quote the reference {reference} to your contact at the plant."
            ),
            _ => format!(
                "To appeal, or when you resubmit corrected labels, quote the reference {reference} to your contact at the plant; a reviewer opens the batch with it."
            ),
        };
        Appeal { reference, text }
    }

    /// The notice for a policy decision on a scored batch (accepted or quarantined). `items` are the
    /// flagged items (see [`flagged_items`]); they are kept with their scores and proposed labels, and
    /// [`Notice::redacted`] removes what the settings do not disclose.
    pub fn for_decision(
        batch: BatchRef,
        decision: &Decision,
        repair_cost: f64,
        items_total: u64,
        items: Vec<NoticeItem>,
    ) -> Self {
        let verdict = match decision.verdict {
            Verdict::Accept => NoticeVerdict::Accepted,
            Verdict::Quarantine => NoticeVerdict::Quarantined,
        };
        let mut n = Self::new(verdict, DecidedBy::Policy, batch);
        n.reasons = decision
            .reasons
            .iter()
            .map(|r| NoticeReason::new(r.code.as_str(), r.detail.clone()))
            .collect();
        n.items_total = Some(items_total);
        n.items_listed_total = items.len() as u64;
        n.items = items;
        n.repair_cost = repair_cost.is_finite().then_some(repair_cost);
        n
    }

    /// The notice for a file that could not be read as a batch.
    pub fn malformed(batch: BatchRef, reasons: Vec<NoticeReason>) -> Self {
        let mut n = Self::new(NoticeVerdict::Malformed, DecidedBy::Policy, batch);
        n.reasons = reasons;
        n
    }

    /// The notice for a re-delivered batch; `first_batch_id` is the first delivery's id.
    pub fn duplicate(batch: BatchRef, first_batch_id: &str) -> Self {
        let mut n = Self::new(NoticeVerdict::Duplicate, DecidedBy::Policy, batch);
        n.reasons = vec![NoticeReason::new(
            "duplicate",
            format!(
                "This file has exactly the same content (the same SHA-256) as a file you delivered earlier, batch {first_batch_id}; that delivery's notice files carry .{first_batch_id} in their names."
            ),
        )];
        n.duplicate_of = Some(first_batch_id.to_string());
        n
    }

    /// The file stem: `<delivered file stem>.<batch id>` for a first verdict,
    /// `<delivered file stem>.<batch id>.<verdict>` for a review decision (just the batch id when the
    /// delivered name has no usable character).
    pub fn file_stem(&self) -> String {
        let delivered = self
            .file_name
            .as_deref()
            .map(delivered_stem)
            .unwrap_or_default();
        let mut stem = if delivered.is_empty() {
            self.batch_id.clone()
        } else {
            format!("{delivered}.{}", self.batch_id)
        };
        if self.verdict.is_review() {
            stem.push('.');
            stem.push_str(self.verdict.as_str());
        }
        stem
    }

    /// A copy with only what `settings` (and a reviewer's explicit choice) allow:
    /// * without `disclose_scores`: no suspicion per item, no repair cost, and the policy reasons' details
    ///   (which carry numbers) replaced by a fixed sentence per code;
    /// * without `disclose_proposed_labels` (or a reviewer's `disclosure.by_reviewer`): no proposed labels;
    /// * items cut to `max_items` (the count before the cut stays in `items_listed_total`).
    pub fn redacted(&self, settings: &NoticeSettings) -> Notice {
        let mut n = self.clone();
        let scores = settings.disclose_scores;
        let proposed = settings.disclose_proposed_labels
            || (self.disclosure.by_reviewer && self.disclosure.proposed_labels);
        n.disclosure = Disclosure {
            scores,
            proposed_labels: proposed,
            by_reviewer: self.disclosure.by_reviewer && self.disclosure.proposed_labels,
        };
        if !scores {
            n.repair_cost = None;
            for r in &mut n.reasons {
                if let Some(text) = generic_policy_detail(&r.code) {
                    r.detail = text.to_string();
                }
            }
        }
        n.items_listed_total = n.items_listed_total.max(n.items.len() as u64);
        n.suspicion_notice = n.caution_applies().then(|| SUSPICION_SENTENCE.to_string());
        n.next_step = n.next_step_for();
        n.appeal = n.appeal_for();
        if n.items.len() > settings.max_items {
            n.items.truncate(settings.max_items);
            n.items_truncated = true;
        }
        for it in &mut n.items {
            if !scores {
                it.suspicion = None;
            }
            if !proposed {
                it.proposed_label = None;
            }
        }
        n
    }

    /// The CSV rendering: header `batch_id,item_id,reasons[,proposed_label][,suspicion]`, one row per
    /// listed item, reasons joined with `;`. Every cell is quoted and neutralised ([`csv_cell`]).
    pub fn to_csv(&self) -> io::Result<Vec<u8>> {
        let mut w = csv::WriterBuilder::new()
            .quote_style(csv::QuoteStyle::Always)
            .from_writer(Vec::new());
        let mut header = vec!["batch_id", "item_id", "reasons"];
        if self.disclosure.proposed_labels {
            header.push("proposed_label");
        }
        if self.disclosure.scores {
            header.push("suspicion");
        }
        w.write_record(header.iter().map(|h| csv_cell(h)))?;
        for it in &self.items {
            let mut rec = vec![
                csv_cell(&self.batch_id),
                csv_cell(&it.id),
                csv_cell(&it.reasons.join(";")),
            ];
            if self.disclosure.proposed_labels {
                rec.push(csv_cell(it.proposed_label.as_deref().unwrap_or("")));
            }
            if self.disclosure.scores {
                rec.push(csv_cell(
                    &it.suspicion.map(|s| format!("{s:.4}")).unwrap_or_default(),
                ));
            }
            w.write_record(&rec)?;
        }
        w.into_inner().map_err(|e| e.into_error())
    }
}

/// Policy reason details carry numbers; without `disclose_scores` they are replaced by these.
fn generic_policy_detail(code: &str) -> Option<&'static str> {
    let code = ReasonCode::ALL.into_iter().find(|c| c.as_str() == code)?;
    Some(match code {
        ReasonCode::WithinBaseline => "The batch's scores are within this vendor's usual range.",
        ReasonCode::WithinColdStartLimits => {
            "The batch's scores are within the limits used while a vendor's history is short."
        }
        ReasonCode::ScoreInvalid => "The batch could not be scored reliably.",
        ReasonCode::RepairCostCeiling => {
            "The share of labels that would have to change is above the fixed limit for every vendor."
        }
        ReasonCode::DamageCeiling => {
            "Adding the batch as delivered would worsen the model on the trusted items by more than the fixed limit."
        }
        ReasonCode::ColdStartRepairCost => {
            "The share of labels that would have to change is above the limit used while a vendor's history is short."
        }
        ReasonCode::ColdStartDamage => {
            "Adding the batch as delivered would worsen the model on the trusted items by more than the limit used while a vendor's history is short."
        }
        ReasonCode::RepairCostOutlier => {
            "The share of labels that would have to change is far above this vendor's usual range."
        }
        ReasonCode::RepairCostDrift => {
            "This vendor's recent batches have drifted upward in the share of labels that would have to change."
        }
        ReasonCode::FlaggedShareCeiling => {
            "The share of items in doubt (held for a reviewer's check) is above the fixed limit for every vendor."
        }
        ReasonCode::ColdStartFlaggedShare => {
            "The share of items in doubt (held for a reviewer's check) is above the limit used while a vendor's history is short."
        }
        ReasonCode::FlaggedShareOutlier => {
            "The share of items in doubt (held for a reviewer's check) is far above this vendor's usual range."
        }
        ReasonCode::FlaggedShareDrift => {
            "This vendor's recent batches have drifted upward in the share of items in doubt."
        }
        ReasonCode::FlaggedItemsExcess => {
            "More items were in doubt than the checks expect for a batch of this size with correct labels."
        }
        ReasonCode::FlaggedItemsDrift => {
            "Across this vendor's recent items, the share in doubt has drifted upward."
        }
        ReasonCode::LabelsUnlikely => {
            "Across this vendor's recent items, the labels fit the checks' model less well than correct labels would."
        }
        ReasonCode::FlaggedItemsInClass => {
            "Among the items given one label, more were in doubt than the checks expect if those labels were right."
        }
        ReasonCode::SpotCheckDisagreement => {
            "Expert checks of a sample of items from this vendor's recent batches disagreed with the labels more often than expected, so its batches wait for review."
        }
        ReasonCode::ItemsUnlikePool => {
            "The items are unlike the data the checks were built on, so their labels could not be judged. This is not a finding about your labels; our operations team will look at the data source."
        }
    })
}

/// A reason code as shown inside a Markdown code span: only `[a-z0-9_]` survive.
fn code_text(code: &str) -> String {
    code.chars()
        .filter(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || *c == '_')
        .take(64)
        .collect()
}

/// The finding codes for one scored item: [`item_codes::CONTRADICTS_TRUSTED`] where the repair path
/// moved its label or the trusted-anchored learner doubts it (≥ 0.5), [`item_codes::UNLIKE_SIMILAR`] where
/// the reference model doubts it (≥ 0.5); [`item_codes::LABEL_SUSPECTED`] when neither alone says so.
pub fn finding_codes(s: &crate::model::ItemScore) -> Vec<String> {
    let mut v = Vec::new();
    if s.flagged_at_step.is_some() || s.anchored_doubt >= 0.5 {
        v.push(item_codes::CONTRADICTS_TRUSTED.to_string());
    }
    if s.learner_doubt >= 0.5 {
        v.push(item_codes::UNLIKE_SIMILAR.to_string());
    }
    if v.is_empty() {
        v.push(item_codes::LABEL_SUSPECTED.to_string());
    }
    v
}

/// The delivered file's name as a file-name stem: its extension dropped, `[A-Za-z0-9_-]` kept, any other
/// run of characters turned into one `-`, at most 60 characters.
pub fn delivered_stem(name: &str) -> String {
    let base = name.rsplit('/').next().unwrap_or(name);
    let base = match base.rsplit_once('.') {
        Some((b, _)) if !b.is_empty() => b,
        _ => base,
    };
    let mut out = String::new();
    for c in base.chars() {
        if c.is_ascii_alphanumeric() || c == '_' || c == '-' {
            out.push(c);
        } else if !out.ends_with('-') {
            out.push('-');
        }
        if out.len() >= 60 {
            break;
        }
    }
    out.trim_matches('-').to_string()
}

/// The notice items for a scored batch: the items whose label the repair moved (`proposed_label ≠
/// label`), most suspicious first, each with the `label_suspected` code, its suspicion and proposed label
/// (removed later unless disclosed).
///
/// `item_ids[i]` is the id of batch row `i` (use the 1-based row number when the batch has none) and
/// `class_names[k]` the name of class `k`.
pub fn flagged_items(
    assessment: &crate::model::Assessment,
    item_ids: &[String],
    class_names: &[String],
) -> Vec<NoticeItem> {
    assessment
        .ranked()
        .into_iter()
        .filter(|s| s.proposed_label != s.label)
        .map(|s| NoticeItem {
            id: item_ids
                .get(s.index)
                .cloned()
                .unwrap_or_else(|| (s.index + 1).to_string()),
            row: Some(s.index as u64 + 1),
            reasons: finding_codes(s),
            proposed_label: Some(
                class_names
                    .get(s.proposed_label)
                    .cloned()
                    .unwrap_or_else(|| s.proposed_label.to_string()),
            ),
            suspicion: Some(s.suspicion),
        })
        .collect()
}

/// Whether a batch id is safe as a file-name stem (`[A-Za-z0-9_-]`, 1–128 characters).
pub fn is_safe_batch_id(id: &str) -> bool {
    !id.is_empty()
        && id.len() <= 128
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
}

/// Whether a notice file stem is a safe file name: `[A-Za-z0-9_.-]`, no leading dot, no `..`.
fn is_safe_stem(stem: &str) -> bool {
    !stem.is_empty()
        && !stem.starts_with('.')
        && !stem.contains("..")
        && stem
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-' || b == b'.')
}

/// Mode of `notices/`: others may pass through to their own folder but not list who else is there.
pub const NOTICES_MODE: u32 = 0o711;
/// Mode of `notices/<vendor>/`: the daemon and the folder's group only (the tmpfiles snippet gives each
/// vendor's folder that vendor's group), so one vendor cannot read another's notices.
pub const VENDOR_NOTICES_MODE: u32 = 0o750;
/// Mode of a notice file (see [`VENDOR_NOTICES_MODE`]).
pub const NOTICE_FILE_MODE: u32 = 0o640;

/// Write a notice into `vendor_dir` (the vendor's folder, `<workspace>/notices/<vendor>/`, created if
/// missing): `<stem>.json` always, `<stem>.md` and `<stem>.items.csv` as configured. The notice is
/// redacted with `settings` first. Each file is written atomically — a temporary file in the same folder,
/// fsync, rename over the final name — and the folder is fsynced once after the last rename, which makes
/// all the renames durable together (see [`crate::fsx`]). Returns the paths written.
pub fn write_notice(
    vendor_dir: &Path,
    notice: &Notice,
    settings: &NoticeSettings,
) -> io::Result<Vec<PathBuf>> {
    if !is_safe_batch_id(&notice.batch_id) || !is_safe_stem(&notice.file_stem()) {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "batch id is not a safe file name",
        ));
    }
    std::fs::create_dir_all(vendor_dir)?;
    let n = notice.redacted(settings);
    let stem = n.file_stem();
    let mut files = vec![(
        format!("{stem}.json"),
        serde_json::to_vec_pretty(&n).map_err(io::Error::other)?,
    )];
    if settings.markdown {
        files.push((format!("{stem}.md"), n.to_markdown(settings).into_bytes()));
    }
    if settings.csv {
        files.push((format!("{stem}.items.csv"), n.to_csv()?));
    }
    crate::fsx::write_atomic_all(vendor_dir, &files, Some(NOTICE_FILE_MODE))
}

mod markdown;
pub use markdown::{item_code_meaning, md_code, md_text};

#[cfg(test)]
mod tests;
