//! Trusted-set upkeep: the rolling window, class balance, `trusted list`, `add` and `remove`.

use std::collections::{BTreeMap, HashSet};
use std::path::Path;

use chrono::{DateTime, Duration as ChronoDuration, Utc};
use serde::{Deserialize, Serialize};

use crate::config::TrustedSettings;
use crate::data;
use crate::data::{Classes, Format};
use crate::store::{AuditRecord, TrustedItem, RECORD_VERSION};

use super::{
    caller_detail, require_by, require_reason, rescan, RescanReport, ReviewEnv, ReviewError,
    TrustedAddRequest, TrustedRemoveRequest,
};

/// A trusted item with its provenance (no features).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedView {
    /// Item id.
    pub id: String,
    /// Verified label.
    pub label: String,
    /// Who verified it.
    pub added_by: String,
    /// When it entered the set.
    pub added_at: DateTime<Utc>,
    /// Where it came from.
    pub source: String,
}

/// Class balance of the trusted set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Balance {
    /// `(class, items)` in class order.
    pub per_class: Vec<(String, usize)>,
    /// Total items.
    pub total: usize,
    /// Warnings: classes with too few items to judge batches against, strong imbalance.
    pub warnings: Vec<String>,
}

/// Check size and class balance: a class below `min_items_per_class` gets a warning; so does a ratio of
/// more than 10 between the largest and the smallest class.
pub fn balance(classes: &[String], items: &[TrustedItem], settings: &TrustedSettings) -> Balance {
    let mut count: BTreeMap<&str, usize> = classes.iter().map(|c| (c.as_str(), 0)).collect();
    for t in items {
        if let Some(c) = count.get_mut(t.label.as_str()) {
            *c += 1;
        }
    }
    let per_class: Vec<(String, usize)> = classes
        .iter()
        .map(|c| (c.clone(), count.get(c.as_str()).copied().unwrap_or(0)))
        .collect();
    let mut warnings = Vec::new();
    for (c, n) in &per_class {
        if *n < settings.min_items_per_class {
            warnings.push(format!(
                "class {} has {n} trusted item(s), fewer than min_items_per_class = {}: batches cannot be judged reliably on this class",
                crate::text::sanitize(c),
                settings.min_items_per_class
            ));
        }
    }
    let max = per_class.iter().map(|p| p.1).max().unwrap_or(0);
    let min = per_class.iter().map(|p| p.1).min().unwrap_or(0);
    if min > 0 && max > 10 * min {
        warnings.push(format!(
            "the trusted set is strongly imbalanced: {max} items in the largest class, {min} in the smallest"
        ));
    }
    Balance {
        total: items.len(),
        per_class,
        warnings,
    }
}

/// The items the rolling window removes, oldest first within each class:
///
/// * with `max_age_days > 0`, items verified more than that many days before `now`, while the class
///   keeps more than `min_items_per_class` items;
/// * with `max_items_per_class > 0`, the oldest items beyond that many per class.
pub(crate) fn window_removals(
    items: &[TrustedItem],
    settings: &TrustedSettings,
    now: DateTime<Utc>,
) -> Vec<String> {
    let mut by_class: BTreeMap<&str, Vec<&TrustedItem>> = BTreeMap::new();
    for t in items {
        by_class.entry(t.label.as_str()).or_default().push(t);
    }
    let mut out = Vec::new();
    for (_, mut v) in by_class {
        v.sort_by(|a, b| a.added_at.cmp(&b.added_at).then(a.id.cmp(&b.id)));
        let mut left = v.len();
        let mut start = 0;
        if settings.max_age_days > 0 {
            let cutoff = now - ChronoDuration::days(settings.max_age_days as i64);
            while start < v.len()
                && v[start].added_at < cutoff
                && left > settings.min_items_per_class
            {
                out.push(v[start].id.clone());
                start += 1;
                left -= 1;
            }
        }
        if settings.max_items_per_class > 0 {
            while left > settings.max_items_per_class {
                out.push(v[start].id.clone());
                start += 1;
                left -= 1;
            }
        }
    }
    out
}

/// The trusted set with provenance and balance.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedReport {
    /// Items, in id order.
    pub items: Vec<TrustedView>,
    /// Balance and warnings.
    pub balance: Balance,
}

/// List the trusted set.
pub fn trusted_list(env: &ReviewEnv<'_>) -> Result<TrustedReport, ReviewError> {
    let items = env.store.trusted_items()?;
    let balance = balance(&env.meta.classes, &items, &env.config.trusted);
    Ok(TrustedReport {
        items: items
            .into_iter()
            .map(|t| TrustedView {
                id: t.id,
                label: t.label,
                added_by: t.added_by,
                added_at: t.added_at,
                source: t.source,
            })
            .collect(),
        balance,
    })
}

/// What a trusted-set change did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedChange {
    /// Items added.
    pub added: Vec<String>,
    /// Items replaced (same id, new content).
    pub replaced: Vec<String>,
    /// Items removed on request.
    pub removed: Vec<String>,
    /// Items the rolling window removed.
    pub expired: Vec<String>,
    /// Balance after the change.
    pub balance: Balance,
    /// The re-check of recently accepted batches.
    pub rescan: RescanReport,
}

/// Add trusted items from a file (CSV or JSON Lines in the workspace's schema, labels among the
/// workspace's classes), with provenance, then apply the window and re-check recent batches.
pub fn trusted_add(
    env: &ReviewEnv<'_>,
    req: &TrustedAddRequest,
) -> Result<TrustedChange, ReviewError> {
    require_by(&req.by)?;
    if req.source.trim().is_empty() {
        return Err(ReviewError::Invalid(
            "trusted items need a source (--source): where were they verified?".into(),
        ));
    }
    let format = Format::from_path(Path::new(&req.file_name)).ok_or_else(|| {
        ReviewError::Invalid(format!(
            "{}: expected a .csv or .jsonl file",
            crate::text::sanitize(&req.file_name)
        ))
    })?;
    let table = data::parse_table(
        req.content.as_bytes(),
        format,
        &crate::text::sanitize(&req.file_name),
        &env.config.table_options(),
        Some(&env.meta.features),
    )
    .map_err(|e| ReviewError::Invalid(e.to_string()))?;
    let classes = Classes::from_labels(&env.meta.classes);
    table
        .class_indices_in(&classes, &env.config.schema.label_column)
        .map_err(|e| ReviewError::Invalid(e.to_string()))?;
    let existing = env.store.trusted_items()?;
    let existing_ids: HashSet<&str> = existing.iter().map(|t| t.id.as_str()).collect();
    let mut replaced = Vec::new();
    for id in &table.ids {
        if existing_ids.contains(id.as_str()) {
            if !req.replace {
                return Err(ReviewError::Invalid(format!(
                    "the trusted set already has an item {} (use --replace to replace it)",
                    crate::text::sanitize(id)
                )));
            }
            replaced.push(id.clone());
        }
    }
    let now = Utc::now();
    let new_items: Vec<TrustedItem> = (0..table.len())
        .map(|i| TrustedItem {
            version: RECORD_VERSION,
            id: table.ids[i].clone(),
            label: table.labels[i].clone(),
            features: table.features.row(i).to_vec(),
            weight: 1.0,
            added_by: req.by.clone(),
            added_at: now,
            source: req.source.clone(),
        })
        .collect();
    // The set after the change, for the window.
    let new_ids: HashSet<&str> = new_items.iter().map(|t| t.id.as_str()).collect();
    let mut after: Vec<TrustedItem> = existing
        .iter()
        .filter(|t| !new_ids.contains(t.id.as_str()))
        .cloned()
        .collect();
    after.extend(new_items.iter().cloned());
    let expired = window_removals(&after, &env.config.trusted, now);
    let added: Vec<String> = new_items
        .iter()
        .map(|t| t.id.clone())
        .filter(|id| !replaced.contains(id))
        .collect();
    let mut detail = caller_detail(env);
    detail["file"] = serde_json::json!(crate::text::sanitize(&req.file_name));
    detail["source"] = serde_json::json!(req.source);
    detail["added"] = serde_json::json!(capped(&added));
    detail["replaced"] = serde_json::json!(capped(&replaced));
    detail["count"] = serde_json::json!(new_items.len());
    let mut audits = vec![AuditRecord::new(&req.by, "trusted_add")
        .reason(req.source.clone())
        .detail(detail)];
    if !expired.is_empty() {
        audits.push(
            AuditRecord::new(&req.by, "trusted_expire")
                .reason("rolling window ([trusted] max_items_per_class / max_age_days)")
                .detail(serde_json::json!({ "ids": capped(&expired) })),
        );
    }
    env.store.update_trusted(&new_items, &expired, audits)?;
    env.hooks.trusted_changed();
    let expired_set: HashSet<&str> = expired.iter().map(|s| s.as_str()).collect();
    after.retain(|t| !expired_set.contains(t.id.as_str()));
    let balance = balance(&env.meta.classes, &after, &env.config.trusted);
    let rescan = rescan(env, &req.by)?;
    Ok(TrustedChange {
        added,
        replaced,
        removed: Vec::new(),
        expired,
        balance,
        rescan,
    })
}

pub(super) fn capped(ids: &[String]) -> Vec<String> {
    ids.iter().take(1000).cloned().collect()
}

/// Remove trusted items (a reason is required), then re-check recent batches. Refuses to empty a class.
pub fn trusted_remove(
    env: &ReviewEnv<'_>,
    req: &TrustedRemoveRequest,
) -> Result<TrustedChange, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    let existing = env.store.trusted_items()?;
    let ids: HashSet<&str> = existing.iter().map(|t| t.id.as_str()).collect();
    for id in &req.ids {
        if !ids.contains(id.as_str()) {
            return Err(ReviewError::NotFound(format!(
                "no trusted item {}",
                crate::text::sanitize(id)
            )));
        }
    }
    let gone: HashSet<&str> = req.ids.iter().map(|s| s.as_str()).collect();
    let after: Vec<TrustedItem> = existing
        .iter()
        .filter(|t| !gone.contains(t.id.as_str()))
        .cloned()
        .collect();
    let bal = balance(&env.meta.classes, &after, &env.config.trusted);
    if let Some((c, _)) = bal.per_class.iter().find(|(_, n)| *n == 0) {
        return Err(ReviewError::Refused(format!(
            "removing these items would leave class {} without trusted items",
            crate::text::sanitize(c)
        )));
    }
    let mut detail = caller_detail(env);
    detail["ids"] = serde_json::json!(capped(&req.ids));
    let audit = AuditRecord::new(&req.by, "trusted_remove")
        .reason(req.reason.clone())
        .detail(detail);
    env.store.update_trusted(&[], &req.ids, vec![audit])?;
    env.hooks.trusted_changed();
    let rescan = rescan(env, &req.by)?;
    Ok(TrustedChange {
        added: Vec::new(),
        replaced: Vec::new(),
        removed: req.ids.clone(),
        expired: Vec::new(),
        balance: bal,
        rescan,
    })
}
