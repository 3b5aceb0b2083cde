//! A reviewer resets a vendor's drift statistic: after checking a drift alarm (`repair_cost_drift`,
//! `flagged_share_drift`) and deciding that the vendor's current level is its new normal, both CUSUMs
//! return to 0 and the values held aside during the excursion join the vendor's baselines
//! ([`crate::policy::VendorHistory::reset_cusum`]). Audited like every review decision.
//!
//! While the daemon runs, a batch of this vendor that is being decided at that very moment records the
//! history it read before the reset; the report names the statistics as they were reset, and a second
//! reset is harmless.

use serde::{Deserialize, Serialize};

use crate::store::AuditRecord;

use super::{caller_detail, require_by, require_reason, ReviewEnv, ReviewError};

/// `vendor reset-drift`: who resets which vendor's drift statistic, and why.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DriftResetRequest {
    /// The vendor (one of the configured vendors).
    pub vendor: String,
    /// Who decides.
    pub by: String,
    /// Why (recorded in the audit trail).
    pub reason: String,
}

/// What a reset changed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DriftReset {
    /// The vendor.
    pub vendor: String,
    /// Who reset it.
    pub by: String,
    /// The repair cost's CUSUM before the reset (after it: 0).
    pub repair_cost_cusum_before: f64,
    /// The flagged share's CUSUM before the reset (after it: 0).
    pub flagged_share_cusum_before: f64,
    /// Values held aside during the excursion that joined the baselines (both signals).
    pub held_values_joined: usize,
    /// Accepted repair costs in the vendor's baseline after the reset.
    pub baseline_batches: usize,
    /// Whether a spot-check hold ([`crate::policy::spot`]) was cleared.
    #[serde(default)]
    pub spot_hold_cleared: bool,
}

/// Reset a vendor's drift statistic (see the module documentation).
pub fn drift_reset(
    env: &ReviewEnv<'_>,
    req: &DriftResetRequest,
) -> Result<DriftReset, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    if !env.config.vendors.contains(&req.vendor) {
        return Err(ReviewError::NotFound(format!(
            "no vendor {} in the configuration",
            crate::text::sanitize(&req.vendor)
        )));
    }
    let mut h = env.store.vendor_history(&req.vendor)?;
    let (cost_before, share_before) = (h.cusum, h.flagged_share.cusum);
    let held = h.pending_costs.len() + h.flagged_share.pending.len();
    let spot_hold_cleared = h.spot_hold.is_some();
    h.reset_cusum(&env.config.policy);
    let mut detail = caller_detail(env);
    detail["repair_cost_cusum_before"] = serde_json::json!(cost_before);
    detail["flagged_share_cusum_before"] = serde_json::json!(share_before);
    detail["held_values_joined"] = serde_json::json!(held);
    detail["spot_hold_cleared"] = serde_json::json!(spot_hold_cleared);
    let mut audit = AuditRecord::new(&req.by, "drift_reset")
        .reason(req.reason.clone())
        .detail(detail);
    audit.vendor = Some(req.vendor.clone());
    env.store.set_vendor_history(&req.vendor, &h, audit)?;
    Ok(DriftReset {
        vendor: req.vendor.clone(),
        by: req.by.clone(),
        repair_cost_cusum_before: cost_before,
        flagged_share_cusum_before: share_before,
        held_values_joined: held,
        baseline_batches: h.accepted_costs.len(),
        spot_hold_cleared,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::policy::VendorHistory;
    use crate::review::{handle, page_path, Caller, NoHooks, Request};
    use crate::scenario::{self, Plant};
    use crate::store::{BatchRecord, BatchState, Store, WorkspaceMeta};
    use crate::workspace::Workspace;

    /// A workspace of the recycling plant with vendor `v` (store open, daemon stopped).
    fn workspace(dir: &std::path::Path) -> (Workspace, Config, Store, WorkspaceMeta) {
        let plant = Plant::new(3);
        let (x, y) = plant.sample_per_class(6, 4);
        let mut csv = Vec::new();
        crate::data::write_csv(
            &mut csv,
            ("id", "label"),
            &scenario::item_ids("t", y.len()),
            &scenario::label_names(&y),
            &scenario::feature_names(),
            x.view(),
        )
        .unwrap();
        let trusted = dir.join("trusted.csv");
        std::fs::write(&trusted, csv).unwrap();
        let root = dir.join("ws");
        crate::workspace::create_workspace(&root, &trusted, &["v".to_string()], "test").unwrap();
        let config = Config::from_workspace(&root).unwrap();
        let store = Store::open_workspace(&root, &config.store).unwrap();
        let meta = store.workspace_meta().unwrap();
        (Workspace::new(&root), config, store, meta)
    }

    #[test]
    fn a_reset_zeroes_both_cusums_merges_held_values_and_is_audited() {
        let d = tempfile::tempdir().unwrap();
        let (ws, config, store, meta) = workspace(d.path());
        let env = ReviewEnv {
            ws: &ws,
            config: &config,
            store: &store,
            meta: &meta,
            hooks: &NoHooks,
            caller: Caller::default(),
        };
        // A vendor in a drift excursion: ten accepted costs, two held aside, both CUSUMs above 0.
        let mut h = VendorHistory::default();
        h.accepted_costs.extend([0.01; 10]);
        h.pending_costs.extend([0.03, 0.035]);
        h.cusum = 4.2;
        h.flagged_share.accepted.extend([0.05; 10]);
        h.flagged_share.pending.push_back(0.09);
        h.flagged_share.cusum = 1.5;
        store
            .set_vendor_history("v", &h, AuditRecord::new("test", "seed"))
            .unwrap();
        let req = |vendor: &str, reason: &str| DriftResetRequest {
            vendor: vendor.into(),
            by: "priya".into(),
            reason: reason.into(),
        };
        assert!(matches!(
            drift_reset(&env, &req("v", "")),
            Err(ReviewError::Invalid(_))
        ));
        assert!(matches!(
            drift_reset(&env, &req("nobody", "new sorter line")),
            Err(ReviewError::NotFound(_))
        ));
        let r = drift_reset(&env, &req("v", "new sorter line")).unwrap();
        assert_eq!(r.repair_cost_cusum_before, 4.2);
        assert_eq!(r.flagged_share_cusum_before, 1.5);
        assert_eq!(r.held_values_joined, 3);
        assert_eq!(r.baseline_batches, 12);
        let after = store.vendor_history("v").unwrap();
        assert_eq!((after.cusum, after.flagged_share.cusum), (0.0, 0.0));
        assert!(after.pending_costs.is_empty() && after.flagged_share.pending.is_empty());
        assert_eq!(after.accepted_costs.len(), 12);
        assert_eq!(after.flagged_share.accepted.len(), 11);
        let last = store.audit_since(0).unwrap().pop().unwrap();
        assert_eq!(last.action, "drift_reset");
        assert_eq!(last.actor, "priya");
        assert_eq!(last.vendor.as_deref(), Some("v"));
        assert_eq!(last.reason.as_deref(), Some("new sorter line"));
        assert_eq!(last.detail["repair_cost_cusum_before"], 4.2);
        // The same request over the admin channel's vocabulary.
        let v = handle(&env, Request::DriftReset(req("v", "again"))).unwrap();
        assert_eq!(v["repair_cost_cusum_before"], 0.0);
    }

    #[test]
    fn the_review_page_goes_beside_the_report() {
        let ws = Workspace::new("/w");
        let mut rec = BatchRecord::claimed(
            "b00000007".into(),
            "v",
            "x.csv".into(),
            "b00000007.csv".into(),
        );
        assert_eq!(page_path(&ws, &rec), None);
        rec.state = BatchState::Quarantined;
        assert_eq!(
            page_path(&ws, &rec),
            Some(std::path::PathBuf::from(
                "/w/quarantine/b00000007.review.html"
            ))
        );
        rec.state = BatchState::Released;
        assert_eq!(
            page_path(&ws, &rec).unwrap().parent(),
            Some(std::path::Path::new("/w/accepted"))
        );
    }
}
