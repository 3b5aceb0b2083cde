//! The policy's rules, one phase at a time: invalid scores, the absolute ceilings, the repair cost and
//! damage against the vendor's baseline (or the cold-start limits), the flagged share likewise, and the
//! accepting reason when no rule fired. Every rule that fires is reported.

use super::{
    Baseline, BatchSignals, Decision, ItemJudgement, PolicySettings, Reason, ReasonCode,
    VendorHistory, Verdict,
};

fn push(reasons: &mut Vec<Reason>, code: ReasonCode, detail: String) {
    reasons.push(Reason { code, detail });
}

pub(super) fn judge(
    settings: &PolicySettings,
    history: &VendorHistory,
    repair_cost: f64,
    damage: f64,
    signals: Option<&BatchSignals>,
) -> Decision {
    let baseline = Baseline::compute(settings, history, repair_cost);
    let flagged = signals.map(|s| {
        (
            s,
            Baseline::flagged_share(settings, history, s.flagged_share, s.items),
        )
    });
    let items = signals
        .filter(|s| settings.judge_items && s.flagged_share.is_finite())
        .map(|s| history.evidence.judge(settings, s));
    let labels = signals
        .filter(|s| settings.judge_labels && s.flagged_share.is_finite())
        .map_or_else(Vec::new, |s| {
            super::classes::check_labels(settings, s, items.as_ref())
        });
    let mut reasons = Vec::new();
    let share_invalid = flagged
        .as_ref()
        .is_some_and(|(s, _)| !s.flagged_share.is_finite());
    if !repair_cost.is_finite() || !damage.is_finite() || share_invalid {
        let detail = match &flagged {
            Some((s, _)) => format!(
                "repair cost {repair_cost}, damage {damage} or share in doubt {} is not a finite number",
                s.flagged_share
            ),
            None => format!("repair cost {repair_cost} or damage {damage} is not a finite number"),
        };
        push(&mut reasons, ReasonCode::ScoreInvalid, detail);
    } else {
        // A batch whose items are unlike the pool: the batch-level scores mix in items the trusted set
        // does not reach, so only the items within reach are judged (item rules), beside the shift
        // finding itself.
        let unlike = items.is_some() && signals.is_some_and(|s| s.unlike_pool(settings).0);
        if !unlike {
            let flagged_signals = flagged.as_ref().map(|(s, _)| *s);
            ceilings(settings, repair_cost, damage, flagged_signals, &mut reasons);
            repair_cost_rules(
                settings,
                &baseline,
                repair_cost,
                damage,
                signals,
                &mut reasons,
            );
        }
        match (&flagged, &items) {
            (Some((s, _)), Some(j)) => {
                item_rules(j, &mut reasons);
                shift_rule(settings, s, &mut reasons);
            }
            (Some((s, fb)), None) => flagged_share_rules(settings, s, fb, &mut reasons),
            _ => {}
        }
        label_rule(&labels, &mut reasons);
    }
    spot_rule(history, &mut reasons);
    let verdict = if reasons.is_empty() {
        let mut r = accepting_reason(
            &baseline,
            flagged.as_ref().map(|(s, fb)| (*s, fb)),
            repair_cost,
            damage,
        );
        if let Some(j) = &items {
            r.detail = format!("{}; {}", r.detail, j.describe());
        }
        reasons.push(r);
        Verdict::Accept
    } else {
        Verdict::Quarantine
    };
    let recall = match &items {
        Some(j) if verdict == Verdict::Quarantine && settings.recall_on_drift => j.recall(),
        _ => 0,
    };
    Decision {
        verdict,
        reasons,
        baseline,
        flagged_share_baseline: flagged.map(|(_, fb)| fb),
        signals: signals.cloned(),
        items,
        labels,
        recall,
    }
}

/// A systematic error on one class: every label whose flagged items exceed the noise allowed if the
/// labels were right (see `policy::classes`), named.
fn label_rule(labels: &[super::LabelCheck], reasons: &mut Vec<Reason>) {
    let fired: Vec<String> = labels
        .iter()
        .filter(|c| c.fires())
        .map(|c| c.describe())
        .collect();
    if !fired.is_empty() {
        push(
            reasons,
            ReasonCode::FlaggedItemsInClass,
            format!(
                "more items in doubt in one class than if its labels were right — {}",
                fired.join("; ")
            ),
        );
    }
}

/// The flagged items as part of the vendor's item stream: this batch's binomial excess and the item
/// CUSUM (see `policy::evidence`).
fn item_rules(j: &ItemJudgement, reasons: &mut Vec<Reason>) {
    if j.excess() {
        push(
            reasons,
            ReasonCode::FlaggedItemsExcess,
            format!(
                "more items in doubt than the noise of {} items allows: {}",
                j.items,
                j.describe()
            ),
        );
    }
    if j.drift() {
        push(
            reasons,
            ReasonCode::FlaggedItemsDrift,
            format!(
                "the vendor's items in doubt drift above its level: {}",
                j.describe()
            ),
        );
    }
    if j.unlikely() {
        push(
            reasons,
            ReasonCode::LabelsUnlikely,
            format!(
                "the vendor's labels are less likely under the reference model than right labels would be: {}",
                j.describe_fit()
            ),
        );
    }
}

/// Items unlike the pool: a finding for operations about the items, not about their labels.
fn shift_rule(settings: &PolicySettings, s: &BatchSignals, reasons: &mut Vec<Reason>) {
    let (unlike, p) = s.unlike_pool(settings);
    if unlike {
        push(
            reasons,
            ReasonCode::ItemsUnlikePool,
            format!(
                "items unlike the pool — the trusted set does not cover them: {} of {} items lie beyond the reach of the pool and the trusted set \
                 (a batch like the pool has {:.2} % there; binomial tail {p:.2e} < {:.0e}, share ≥ {:.2}); their labels were not judged. \
                 This says nothing about the labels: the sensor, the site or the material mix may have changed",
                s.unlike_items,
                s.items,
                100.0 * s.unlike_tail,
                settings.unlike_alpha,
                settings.unlike_min_share
            ),
        );
    }
}

/// The absolute ceilings, which apply whatever the vendor's history.
fn ceilings(
    settings: &PolicySettings,
    repair_cost: f64,
    damage: f64,
    flagged: Option<&BatchSignals>,
    reasons: &mut Vec<Reason>,
) {
    if repair_cost > settings.max_repair_cost {
        push(
            reasons,
            ReasonCode::RepairCostCeiling,
            format!(
                "repair cost {repair_cost:.4} exceeds the ceiling {:.4}",
                settings.max_repair_cost
            ),
        );
    }
    if damage > settings.max_damage_nats {
        push(
            reasons,
            ReasonCode::DamageCeiling,
            format!(
                "damage {damage:.4} nats exceeds the ceiling {:.4} nats",
                settings.max_damage_nats
            ),
        );
    }
    if let Some(s) = flagged {
        // With item judging the ceiling applies to the share above the computed clean level: on data
        // the learner separates poorly, clean batches flag many items.
        let clean = if settings.judge_items {
            s.clean_level(settings)
        } else {
            0.0
        };
        if s.flagged_share - clean > settings.max_flagged_share {
            push(
                reasons,
                ReasonCode::FlaggedShareCeiling,
                format!(
                    "{} items in doubt (share {:.4}) exceeds the ceiling {:.4}{}",
                    flagged_count(s),
                    s.flagged_share,
                    settings.max_flagged_share + clean,
                    if clean > 0.0 {
                        format!(
                            " (the computed clean level {clean:.4} plus {:.4})",
                            settings.max_flagged_share
                        )
                    } else {
                        String::new()
                    }
                ),
            );
        }
    }
}

/// Repair cost and damage: the cold-start limits until the vendor has `min_history` accepted batches,
/// then the modified z-score and the CUSUM against the vendor's own baseline.
fn repair_cost_rules(
    settings: &PolicySettings,
    baseline: &Baseline,
    repair_cost: f64,
    damage: f64,
    signals: Option<&BatchSignals>,
    reasons: &mut Vec<Reason>,
) {
    if baseline.cold_start {
        if repair_cost > settings.cold_start_max_repair_cost {
            push(
            reasons,
                ReasonCode::ColdStartRepairCost,
                format!(
                    "repair cost {repair_cost:.4} exceeds the cold-start limit {:.4} ({} of {} baseline batches so far)",
                    settings.cold_start_max_repair_cost, baseline.n_history, settings.min_history
                ),
            );
        }
        // On data the learner separates poorly (the same test as for the flagged share), a clean
        // batch's damage is noisy: it must also clear E + z·sd, the damage to expect from labels that
        // follow the reference model.
        let weak_model = signals.is_some_and(|s| s.separates_poorly(settings));
        let damage_expected = signals.map_or(f64::NEG_INFINITY, |s| {
            s.expected_damage + settings.cold_start_damage_excess_z * s.expected_damage_sd
        });
        if damage > settings.cold_start_max_damage_nats && (!weak_model || damage > damage_expected)
        {
            push(
            reasons,
                ReasonCode::ColdStartDamage,
                format!(
                    "damage {damage:.4} nats exceeds the cold-start limit {:.4} nats{} ({} of {} baseline batches so far)",
                    settings.cold_start_max_damage_nats,
                    match signals {
                        Some(s) if weak_model => format!(
                            " and the damage {:+.4} nats to expect from labels that follow the reference model by more than {} standard deviations ({:.4} nats)",
                            s.expected_damage, settings.cold_start_damage_excess_z, s.expected_damage_sd
                        ),
                        _ => String::new(),
                    },
                    baseline.n_history,
                    settings.min_history
                ),
            );
        }
    } else {
        if baseline.modified_z > settings.modified_z_limit {
            push(
            reasons,
                ReasonCode::RepairCostOutlier,
                format!(
                    "repair cost {repair_cost:.4} against the vendor's median {:.4}: modified z-score {:.2} > {:.2}",
                    baseline.median, baseline.modified_z, settings.modified_z_limit
                ),
            );
        }
        if baseline.cusum > settings.cusum_h {
            push(
            reasons,
                ReasonCode::RepairCostDrift,
                format!(
                    "CUSUM of the vendor's standardised repair cost {:.2} > h = {:.2} (slow upward drift)",
                    baseline.cusum, settings.cusum_h
                ),
            );
        }
    }
}

/// The flagged share: the cold-start limit (for a small pool its own), then the modified z-score and
/// the CUSUM against the vendor's own flagged shares.
fn flagged_share_rules(
    settings: &PolicySettings,
    s: &BatchSignals,
    fb: &Baseline,
    reasons: &mut Vec<Reason>,
) {
    let x = s.flagged_share;
    if fb.cold_start {
        let (limit, which) = if s.pool_items < settings.small_pool_items {
            (
                settings.cold_start_max_flagged_share_small_pool,
                "cold-start limit for a small pool",
            )
        } else {
            (settings.cold_start_max_flagged_share, "cold-start limit")
        };
        // Where even labels that follow the reference model would flag more than
        // `cold_start_weak_model_share` of the batch, the learner separates the classes poorly and
        // the fixed limit says little: the share must also clear m₀ + z·sd.
        let weak_model = s.separates_poorly(settings);
        let expected =
            s.expected_flagged_share + settings.cold_start_flagged_excess_z * s.expected_flagged_sd;
        if x > limit && (!weak_model || x > expected) {
            push(
                reasons,
                ReasonCode::ColdStartFlaggedShare,
                format!(
                    "{} items in doubt (share {x:.4}) exceeds the {which} {limit:.4}{} ({} of {} baseline batches so far)",
                    flagged_count(s),
                    if weak_model {
                        format!(
                            " and the share {:.4} to expect from labels that follow the reference model by more than {} standard deviations",
                            s.expected_flagged_share, settings.cold_start_flagged_excess_z
                        )
                    } else {
                        String::new()
                    },
                    fb.n_history,
                    settings.min_history
                ),
            );
        }
    } else {
        if fb.modified_z > settings.modified_z_limit {
            push(
                reasons,
                ReasonCode::FlaggedShareOutlier,
                format!(
                    "{} items in doubt (share {x:.4}) against the vendor's median share {:.4}: modified z-score {:.2} > {:.2}",
                    flagged_count(s), fb.median, fb.modified_z, settings.modified_z_limit
                ),
            );
        }
        if fb.cusum > settings.cusum_h {
            push(
                reasons,
                ReasonCode::FlaggedShareDrift,
                format!(
                    "CUSUM of the vendor's standardised share in doubt {:.2} > h = {:.2} (slow upward drift)",
                    fb.cusum, settings.cusum_h
                ),
            );
        }
    }
}

/// Why an accepted batch was accepted: within the cold-start limits, or within the vendor's baseline.
fn accepting_reason(
    baseline: &Baseline,
    flagged: Option<(&BatchSignals, &Baseline)>,
    repair_cost: f64,
    damage: f64,
) -> Reason {
    let share = flagged.map_or(String::new(), |(s, fb)| {
        if fb.cold_start {
            format!(", share in doubt {:.4}", s.flagged_share)
        } else {
            format!(
                ", share in doubt {:.4} (median {:.4}, modified z {:.2}, CUSUM {:.2})",
                s.flagged_share, fb.median, fb.modified_z, fb.cusum
            )
        }
    });
    if baseline.cold_start {
        Reason {
            code: ReasonCode::WithinColdStartLimits,
            detail: format!(
                "repair cost {repair_cost:.4} and damage {damage:.4} nats{share} within the cold-start limits"
            ),
        }
    } else {
        Reason {
            code: ReasonCode::WithinBaseline,
            detail: format!(
                "repair cost {repair_cost:.4} within the vendor's baseline (median {:.4}, modified z {:.2}, CUSUM {:.2}){share}",
                baseline.median, baseline.modified_z, baseline.cusum
            ),
        }
    }
}

/// "k of n" for a reason's text: the flagged items of a batch.
fn flagged_count(s: &BatchSignals) -> String {
    let k = (s.flagged_share * s.items as f64).round();
    format!("{k:.0} of {}", s.items)
}

/// The spot-check hold ([`super::spot`]): once the experts' answers on a vendor's accepted batches have
/// signalled, every later batch waits for review whatever its scores, until a reviewer clears the hold.
fn spot_rule(history: &VendorHistory, reasons: &mut Vec<Reason>) {
    if let Some(h) = &history.spot_hold {
        let stratum = match h.stratum {
            super::spot::Stratum::Hard => "items the model is least sure of",
            super::spot::Stratum::Random => "items drawn at random",
        };
        push(
            reasons,
            ReasonCode::SpotCheckDisagreement,
            format!(
                "expert spot checks of this vendor's accepted batches disagree with its labels more often than a \
                 clean labeler's would ({stratum}: {} of {} checked items differ; chart {:.2} after batch {}); every \
                 batch waits for review until a reviewer clears the hold",
                h.disagreed, h.checked, h.statistic, h.batch
            ),
        );
    }
}
