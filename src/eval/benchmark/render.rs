//! The benchmark report as readable text.

use std::fmt::Write;

use super::*;

/// The report as readable text.
pub fn render_text(r: &BenchReport) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "labelweir engine benchmark ({} mode, seed {})",
        if r.quick { "quick" } else { "full" },
        r.seed,
    );
    let _ = writeln!(
        s,
        "Scores rank items for human review; a high score is a suspicion, not proof of a vendor's error.\n"
    );
    render_cases(&mut s, r);
    render_timing(&mut s, r);
    let _ = writeln!(s, "\n== targets (issue 2) ==");
    for t in &r.targets {
        let _ = writeln!(
            s,
            "   [{}] {} — {}{}",
            if t.met {
                "met "
            } else if t.tie_within_noise {
                "tie "
            } else {
                "MISS"
            },
            t.target,
            t.measured,
            if t.beyond_ceiling {
                " — beyond this learner's ceiling on this data"
            } else {
                ""
            }
        );
    }
    let met = r.targets.iter().filter(|t| t.met).count();
    let beyond = r.targets.iter().filter(|t| t.beyond_ceiling).count();
    let ties = r.targets.iter().filter(|t| t.tie_within_noise).count();
    let _ = writeln!(
        s,
        "   {met}/{} targets met; of the {} missed, {beyond} lie beyond what the learner reaches when given the \
         batch's true labels (the ceiling row) and {ties} [tie] fall short of the better baseline by less than \
         two paired standard errors · {:.1} s",
        r.targets.len(),
        r.targets.len() - met,
        r.wall_seconds
    );
    s
}

/// One section per case: its batch-level figures and the ranking table of every method.
fn render_cases(s: &mut String, r: &BenchReport) {
    let mut last_source = "";
    for c in &r.cases {
        if c.source != last_source {
            let _ = writeln!(
                s,
                "== {} ({} items per batch, {} repetition(s)) ==",
                c.source, c.batch_items, c.runs
            );
            last_source = &c.source;
        }
        let _ = writeln!(
            s,
            "-- {}: {:.1} bugs · flagged {:.1}% (estimated wrong {:.1}%, repair weight {:.2}) · repair cost {:.3} (target reached {}/{}) · damage {:+.4} nats · quarantined {}/{}{} · pool model's accuracy {:.3} · {:.0} ms{}",
            c.attack.label(),
            c.bugs,
            100.0 * c.flagged_share,
            100.0 * c.estimated_wrong_share,
            c.mean_repair_weight,
            c.repair_cost,
            c.target_reached,
            c.runs,
            c.damage,
            c.quarantined,
            c.runs,
            if c.quarantine_reasons.is_empty() {
                String::new()
            } else {
                format!(
                    " ({})",
                    c.quarantine_reasons
                        .iter()
                        .map(|(code, n)| format!("{code} ×{n}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            },
            c.learner_accuracy,
            c.engine_ms,
            if c.converged { "" } else { " · NOT ALL SOLVES CONVERGED" }
        );
        if !c.methods.is_empty() {
            let _ = writeln!(
                s,
                "   {:<34} {:>6} {:>6} {:>7} {:>12}",
                "method", "AUROC", "AP", "P@R½", "labels@k"
            );
            for m in &c.methods {
                let _ = writeln!(
                    s,
                    "   {:<34} {:>6} {:>6} {:>7} {:>12}",
                    m.method,
                    fmt_opt(m.auroc),
                    fmt_opt(m.average_precision),
                    fmt_opt(m.precision_at_half_recall),
                    format!("{}/{}", m.correct_proposals, m.bugs_in_top_k)
                );
            }
        }
    }
}

/// The incremental-vs-exact, scale and sweep sections.
fn render_timing(s: &mut String, r: &BenchReport) {
    if !r.mode_agreement.is_empty() {
        let _ = writeln!(
            s,
            "\n== incremental (pool summary) vs exact (pool re-solve) =="
        );
        for a in &r.mode_agreement {
            let _ = writeln!(
                s,
                "   {:<16} {:<20} Spearman {} · top-20 shared {}/{} · repair cost {:.3} vs {:.3} · damage {:+.4} vs {:+.4} · {:.0} ms vs {:.0} ms",
                a.source,
                a.attack.label(),
                fmt_opt(a.spearman),
                a.top20_shared,
                a.top20_of,
                a.repair_cost_summary,
                a.repair_cost_exact,
                a.damage_summary,
                a.damage_exact,
                a.summary_ms,
                a.exact_ms
            );
        }
    }
    if !r.scale.is_empty() {
        let _ = writeln!(
            s,
            "\n== scoring time, {} items × {} features × {} classes against a pool summary ==",
            r.scale[0].batch_items, r.scale[0].features, r.scale[0].classes
        );
        let _ = writeln!(
            s,
            "   (100k and 1M: the exact 10k summary standing for the larger pool; built in {:.0} ms)",
            r.scale[0].summary_build_ms
        );
        for t in &r.scale {
            let _ = writeln!(
                s,
                "   pool {:>9}: median {:>7.1} ms (min {:.1}, max {:.1}, {} runs; reference {:.0} + train {:.0} + repair {:.0} ms) · summary {} bytes · absorb {:.0} ms",
                t.pool_items,
                t.median_ms,
                t.min_ms,
                t.max_ms,
                t.repeats,
                t.phase_ms[0],
                t.phase_ms[1],
                t.phase_ms[2],
                t.summary_bytes,
                t.absorb_ms
            );
        }
    }
    if let Some(w) = &r.sweep {
        let _ = writeln!(
            s,
            "\n== pool sweep: {} plant items in chunks of {} ==\n   trusted-anchored model fitted in {:.0} ms; scoring {:.0} ms ({:.0} items/s); memory while sweeping {} bytes",
            w.items, w.chunk, w.fit_ms, w.score_ms, w.items_per_s, w.memory_bytes
        );
    }
}
