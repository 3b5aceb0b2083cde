//! The targets checked against the measurements.

use super::*;

pub(super) fn fmt_opt(v: Option<f64>) -> String {
    v.map_or_else(|| "  —  ".into(), |x| format!("{x:.3}"))
}

/// Check the targets against the measurements.
///
/// "Clearly better" on region flips is our reading: average precision at least 0.05 above the better
/// baseline's. "Near zero" for a clean batch: repair cost ≤ 0.02 (under the default cold-start limit
/// of 0.05) and the default policy accepts it.
pub(super) fn check_targets(
    cases: &[CaseReport],
    agreement: &[ModeAgreement],
    scale: &[ScaleTiming],
) -> Vec<TargetCheck> {
    let mut out = Vec::new();
    for c in cases {
        match c.attack {
            Attack::Clean => out.push(TargetCheck {
                target: format!(
                    "{}: clean batch repair cost near zero (≤ 0.02) and accepted",
                    c.source
                ),
                met: c.repair_cost_max <= 0.02 && c.quarantined == 0,
                measured: format!(
                    "repair cost {:.4} (max {:.4}), quarantined {}/{}",
                    c.repair_cost, c.repair_cost_max, c.quarantined, c.runs
                ),
                beyond_ceiling: false,
                tie_within_noise: false,
            }),
            attack => attack_checks(c, attack, &mut out),
        }
    }
    for a in agreement {
        out.push(TargetCheck {
            target: format!(
                "{}: {} incremental vs exact Spearman ≥ 0.99 and same top-20",
                a.source,
                a.attack.label()
            ),
            met: a.spearman.is_some_and(|s| s >= 0.99) && a.top20_shared == a.top20_of,
            measured: format!(
                "Spearman {}, top-20 shared {}/{}",
                fmt_opt(a.spearman),
                a.top20_shared,
                a.top20_of
            ),
            beyond_ceiling: false,
            tie_within_noise: false,
        });
    }
    if let (Some(small), Some(big)) = (
        scale.iter().find(|s| s.pool_items == 10_000),
        scale.iter().find(|s| s.pool_items == 1_000_000),
    ) {
        out.push(TargetCheck {
            target: "1,000 × 32 × 8 batch scored in ≤ 100 ms median at pool 1,000,000".into(),
            met: big.median_ms <= 100.0,
            measured: format!("{:.1} ms", big.median_ms),
            beyond_ceiling: false,
            tie_within_noise: false,
        });
        out.push(TargetCheck {
            target: "scoring at pool 1,000,000 within 2× of pool 10,000".into(),
            met: big.median_ms <= 2.0 * small.median_ms,
            measured: format!("{:.1} ms vs {:.1} ms", big.median_ms, small.median_ms),
            beyond_ceiling: false,
            tie_within_noise: false,
        });
    }
    out
}

/// The targets of one attacked case: AUROC on 10 % uniform and region flips, proposed labels on the true
/// bugs in the top-k, and the engine against the better baseline (paired over repetitions).
fn attack_checks(c: &CaseReport, attack: Attack, out: &mut Vec<TargetCheck>) {
    let better_baseline = |c: &CaseReport, f: fn(&MethodScore) -> Option<f64>| {
        c.methods
            .iter()
            .filter(|m| m.method.ends_with("(baseline)"))
            .filter_map(f)
            .fold(f64::NEG_INFINITY, f64::max)
    };
    let ceiling = |c: &CaseReport| c.methods.iter().find(|m| m.method == CEILING).cloned();
    // A missed target above the ceiling row: say so, and by how much the ceiling falls short.
    let beyond = |met: bool, reach: Option<f64>, goal: f64| !met && reach.is_some_and(|r| r < goal);
    let ceiling_note = |reach: Option<f64>, what: &str| {
        reach.map_or_else(String::new, |r| {
            format!("; the learner given the batch's true labels reaches {what} {r:.3}")
        })
    };
    let Some(e) = c.methods.first().cloned() else {
        return;
    };
    let top = ceiling(c);
    if matches!(attack, Attack::Uniform { rate } | Attack::Region { rate } if (rate - 0.10).abs() < 1e-9)
    {
        let met = e.auroc.is_some_and(|a| a >= 0.95);
        let reach = top.as_ref().and_then(|t| t.auroc);
        out.push(TargetCheck {
            target: format!("{}: {} AUROC ≥ 0.95", c.source, attack.label()),
            met,
            measured: format!("AUROC {}{}", fmt_opt(e.auroc), ceiling_note(reach, "AUROC")),
            beyond_ceiling: beyond(met, reach, 0.95),
            tie_within_noise: false,
        });
    }
    let met = e.label_accuracy().is_some_and(|a| a >= 0.9);
    let reach = top.as_ref().and_then(MethodScore::label_accuracy);
    out.push(TargetCheck {
        target: format!(
            "{}: {} proposed labels ≥ 0.9 on true bugs in top-k",
            c.source,
            attack.label()
        ),
        met,
        measured: format!(
            "{}/{} = {} (the pool model's accuracy on the batch's true labels: {:.3}{})",
            e.correct_proposals,
            e.bugs_in_top_k,
            fmt_opt(e.label_accuracy()),
            c.learner_accuracy,
            ceiling_note(reach, "on its own top-k")
        ),
        beyond_ceiling: beyond(met, reach, 0.9),
        tie_within_noise: false,
    });
    let (ba, bp) = (
        better_baseline(c, |m| m.auroc),
        better_baseline(c, |m| m.average_precision),
    );
    let (ea, ep) = (e.auroc.unwrap_or(0.0), e.average_precision.unwrap_or(0.0));
    let is_region = matches!(attack, Attack::Region { .. } | Attack::WetCardboardAsPaper);
    // "Clearly better" on region flips: AP higher by ≥ 0.05, or — near the ceiling, where 0.05 may
    // not be left — at least a third of the better baseline's AP shortfall (1 − AP) removed.
    let clearly = ep >= bp + 0.05 - 1e-12 || (ep > bp && 1.0 - ep <= (1.0 - bp) * 2.0 / 3.0);
    let met = ea >= ba - 1e-12 && if is_region { clearly } else { ep >= bp - 1e-12 };
    out.push(TargetCheck {
        target: format!(
            "{}: {} {} the better baseline (AUROC and AP{})",
            c.source,
            attack.label(),
            if is_region {
                "clearly beats"
            } else {
                "at least matches"
            },
            if is_region {
                "; AP by ≥ 0.05 or a third of the baseline's shortfall"
            } else {
                ""
            }
        ),
        met,
        measured: format!(
            "engine AUROC {ea:.3} AP {ep:.3}; best baseline AUROC {ba:.3} AP {bp:.3}{}{}",
            if is_region && bp >= 0.999 {
                " (the better baseline is already perfect: cannot be beaten)"
            } else {
                ""
            },
            c.paired_vs_baseline.map_or_else(String::new, |d| format!(
                "; paired over {} repetitions: ΔAUROC {:+.4} ± {:.4}, ΔAP {:+.4} ± {:.4} (mean ± se)",
                c.runs, d.auroc_mean, d.auroc_se, d.ap_mean, d.ap_se
            ))
        ),
        beyond_ceiling: false,
        tie_within_noise: !met
            && !is_region
            && c.paired_vs_baseline.is_some_and(|d| d.within_noise()),
    });
}
