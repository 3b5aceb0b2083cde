//! The self-contained review page: HTML with an inline SVG projection, no scripts, nothing loaded.

use std::path::PathBuf;

use chrono::SecondsFormat;

use crate::store::{BatchRecord, BatchState};
use crate::text::html_escape;
use crate::workspace::Workspace;

pub(crate) use crate::pipeline::outbox::page_name;

use super::{folder_for_state, Projection, ShowReport};

/// Colour for a suspicion in `[0, 1]`: a linear blend from blue (`#2166ac`, low) to red (`#b2182b`,
/// high); grey when unknown.
pub(super) fn suspicion_colour(s: Option<f64>) -> String {
    match s {
        None => "#9e9e9e".into(),
        Some(s) => {
            let t = if s.is_finite() {
                s.clamp(0.0, 1.0)
            } else {
                0.0
            };
            let mix = |a: u8, b: u8| (a as f64 + (b as f64 - a as f64) * t).round() as u8;
            format!(
                "#{:02x}{:02x}{:02x}",
                mix(0x21, 0xb2),
                mix(0x66, 0x18),
                mix(0xac, 0x2b)
            )
        }
    }
}

/// Where `quarantine show` writes a batch's review page by default: beside its report, in the folder of
/// its state (`None` for a batch that has no folder yet).
pub fn page_path(ws: &Workspace, batch: &BatchRecord) -> Option<PathBuf> {
    folder_for_state(batch.state).map(|f| ws.folder(f).join(page_name(&batch.id)))
}

/// The self-contained review page: no scripts, no network (a Content-Security-Policy of
/// `default-src 'none'` forbids both), styles inline, the projection as inline SVG. Well-formed XML
/// (XHTML syntax), so that tests can parse it.
pub fn render_html(report: &ShowReport) -> String {
    use std::fmt::Write as _;
    let b = &report.batch;
    let mut h = String::new();
    let _ = writeln!(h, "<!DOCTYPE html>");
    let _ = writeln!(
        h,
        "<html xmlns=\"http://www.w3.org/1999/xhtml\" lang=\"en\">"
    );
    let _ = writeln!(h, "<head>");
    let _ = writeln!(h, "<meta charset=\"utf-8\"/>");
    let _ = writeln!(
        h,
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\"/>"
    );
    let _ = writeln!(
        h,
        "<title>labelweir review: batch {} from {}</title>",
        html_escape(&b.id),
        html_escape(&b.vendor)
    );
    let _ = writeln!(
        h,
        "<style>body{{font-family:sans-serif;margin:1.5em;max-width:70em;line-height:1.4}}table{{border-collapse:collapse;margin:0.5em 0}}td,th{{border:1px solid #bbb;padding:0.2em 0.5em;text-align:left;vertical-align:top}}.note{{background:#fff6d5;padding:0.5em;border-left:4px solid #e0b000}}svg{{border:1px solid #ccc;background:#fff}}.legend li{{list-style:none}}.sw{{display:inline-block;width:9px;height:9px;border:1px solid #212121;vertical-align:middle}}.dot{{border-radius:50%;border:none}}.ring{{border:2px solid #000000;background:#ffffff}}pre{{background:#f4f4f4;padding:0.5em;white-space:pre-wrap}}dt{{font-weight:bold}}dd{{margin:0 0 0.5em 1.5em}}</style>"
    );
    let _ = writeln!(h, "</head>");
    let _ = writeln!(h, "<body>");
    let _ = writeln!(
        h,
        "<h1>Batch {} from vendor {}: {}</h1>",
        html_escape(&b.id),
        html_escape(&b.vendor),
        html_escape(&b.original_name)
    );
    let _ = writeln!(
        h,
        "<p class=\"note\">{}</p>",
        super::page_parts::html_text(&report.note)
    );
    summary_table(&mut h, report);
    let accepted = matches!(b.state, BatchState::Accepted | BatchState::Released);
    if accepted {
        let _ = writeln!(h, "<h2>How it was judged ({})</h2>\n<ul>", b.state);
    } else {
        let _ = writeln!(h, "<h2>Why it was held</h2>\n<ul>");
    }
    for r in &report.reasons {
        let _ = writeln!(
            h,
            "<li><code>{}</code>: {}</li>",
            html_escape(r.code.as_str()),
            super::page_parts::html_text(&r.detail)
        );
    }
    let _ = writeln!(h, "</ul>");
    super::page_parts::signals(&mut h, report);
    let _ = writeln!(h, "<h2>Projection</h2>");
    match &report.projection {
        Some(p) => {
            render_svg(&mut h, p);
            super::page_parts::legend(&mut h, p);
            let _ = writeln!(
                h,
                "<p>{}; axis 1 explains {:.1} %, axis 2 {:.1} % of the variance.</p>",
                html_escape(&p.method),
                100.0 * p.explained[0],
                100.0 * p.explained[1]
            );
        }
        None => {
            let _ = writeln!(h, "<p>No projection available.</p>");
        }
    }
    if let Some(n) = &report.projection_note {
        let _ = writeln!(h, "<p>{}</p>", super::page_parts::html_text(n));
    }
    super::page_parts::groups(&mut h, report);
    super::page_parts::details(&mut h, report);
    item_tables(&mut h, report);
    super::page_parts::commands(&mut h, report);
    let _ = writeln!(h, "</body>\n</html>");
    h
}

/// The batch's facts: state, file, hash, scores, the vendor's baseline.
fn summary_table(h: &mut String, report: &ShowReport) {
    use std::fmt::Write as _;
    let b = &report.batch;
    let _ = writeln!(h, "<table>");
    let row = |h: &mut String, k: &str, v: &str| {
        let _ = writeln!(h, "<tr><th>{}</th><td>{}</td></tr>", html_escape(k), v);
    };
    row(h, "State", &html_escape(b.state.as_str()));
    row(h, "File as delivered", &html_escape(&b.original_name));
    row(
        h,
        "SHA-256",
        &html_escape(b.sha256.as_deref().unwrap_or("")),
    );
    row(
        h,
        "Received",
        &html_escape(&b.claimed_at.to_rfc3339_opts(SecondsFormat::Secs, true)),
    );
    if let Some(n) = b.items {
        row(h, "Items", &n.to_string());
    }
    if let Some(rc) = &b.recalled {
        row(
            h,
            "Recalled",
            &html_escape(&format!(
                "accepted, then taken back for review when batch {} of this vendor was held by {} (a suspicion, not proof)",
                rc.held_batch,
                rc.rules.join(", ")
            )),
        );
    }
    if let Some(s) = &b.scores {
        row(h, "Repair cost", &format!("{:.4}", s.repair_cost));
        row(h, "Damage (nats)", &format!("{:.4}", s.damage));
    }
    if let Some(bl) = &report.baseline {
        row(
            h,
            "Vendor baseline",
            &super::page_parts::html_text(&format!(
                "median {:.4} over {} accepted batches{}; modified z {:.2}; CUSUM {:.2} (h = {:.1})",
                bl.median,
                bl.n_history,
                if bl.cold_start { " (cold start)" } else { "" },
                bl.modified_z,
                bl.cusum,
                bl.cusum_h
            )),
        );
    }
    let _ = writeln!(h, "</table>");
}

/// The moved items, the trusted items the batch would break, and the batch's audit history.
fn item_tables(h: &mut String, report: &ShowReport) {
    use std::fmt::Write as _;
    let _ = writeln!(
        h,
        "<h2>All flagged items ({})</h2>\n<p>Most suspicious first; a suspicion for review, not proof.</p>",
        report.moved_items.len()
    );
    let _ = writeln!(
        h,
        "<table id=\"flagged\"><tr><th>Item</th><th>Given label</th><th>Proposed label</th><th>Suspicion</th><th>Confidence</th></tr>"
    );
    for m in &report.moved_items {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{:.3}</td><td>{:.2}</td></tr>",
            html_escape(&m.id),
            html_escape(&m.label),
            html_escape(&m.proposed_label),
            m.suspicion,
            m.confidence
        );
    }
    let _ = writeln!(h, "</table>");
    super::page_parts::repair_moved(h, report);
    let _ = writeln!(
        h,
        "<h2>Trusted items the batch as delivered would break ({})</h2>",
        report.broken_trusted.len()
    );
    let _ = writeln!(
        h,
        "<table><tr><th>Trusted item</th><th>Verified label</th><th>Predicted with the batch</th></tr>"
    );
    for t in &report.broken_trusted {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td></tr>",
            html_escape(&t.id),
            html_escape(t.label.as_deref().unwrap_or("")),
            html_escape(t.predicted_with_batch.as_deref().unwrap_or(""))
        );
    }
    let _ = writeln!(h, "</table>");
    let _ = writeln!(h, "<h2>History</h2>");
    let _ = writeln!(
        h,
        "<table><tr><th>When</th><th>Who</th><th>What</th><th>Outcome</th><th>Reason</th></tr>"
    );
    for a in &report.history {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            html_escape(&a.at.to_rfc3339_opts(SecondsFormat::Secs, true)),
            html_escape(&a.actor),
            html_escape(&a.action),
            html_escape(a.outcome.as_deref().unwrap_or("")),
            html_escape(a.reason.as_deref().unwrap_or(""))
        );
    }
    let _ = writeln!(h, "</table>");
}

pub(super) fn render_svg(h: &mut String, p: &Projection) {
    use std::fmt::Write as _;
    const W: f64 = 640.0;
    const H: f64 = 480.0;
    const M: f64 = 24.0;
    let (mut x0, mut x1, mut y0, mut y1) = (f64::MAX, f64::MIN, f64::MAX, f64::MIN);
    for q in &p.points {
        x0 = x0.min(q.x);
        x1 = x1.max(q.x);
        y0 = y0.min(q.y);
        y1 = y1.max(q.y);
    }
    if p.points.is_empty() {
        (x0, x1, y0, y1) = (-1.0, 1.0, -1.0, 1.0);
    }
    let sx = (W - 2.0 * M) / (x1 - x0).max(1e-12);
    let sy = (H - 2.0 * M) / (y1 - y0).max(1e-12);
    let px = |x: f64| M + (x - x0) * sx;
    let py = |y: f64| H - M - (y - y0) * sy;
    let _ = writeln!(
        h,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{W}\" height=\"{H}\" viewBox=\"0 0 {W} {H}\" role=\"img\" aria-label=\"projection of the batch items beside the trusted items\">"
    );
    // Trusted items first (underneath), coloured by their verified class.
    let classes = super::page_parts::trusted_classes(p);
    for q in p.points.iter().filter(|q| q.group == "trusted") {
        let _ = writeln!(
            h,
            "<rect class=\"trusted\" x=\"{:.1}\" y=\"{:.1}\" width=\"7\" height=\"7\" fill=\"{}\" stroke=\"#212121\" stroke-width=\"0.7\"><title>trusted {} ({})</title></rect>",
            px(q.x) - 3.5,
            py(q.y) - 3.5,
            super::page_parts::class_colour(&classes, &q.label),
            html_escape(&q.id),
            html_escape(&q.label)
        );
    }
    for q in p.points.iter().filter(|q| q.group == "batch") {
        let moved = q.proposed_label.is_some();
        let title = match &q.proposed_label {
            Some(pl) => format!(
                "{}: given {}, proposed {}, suspicion {}",
                q.id,
                q.label,
                pl,
                q.suspicion.map_or("?".into(), |s| format!("{s:.3}"))
            ),
            None => format!(
                "{}: given {}, suspicion {}",
                q.id,
                q.label,
                q.suspicion.map_or("?".into(), |s| format!("{s:.3}"))
            ),
        };
        let _ = writeln!(
            h,
            "<circle class=\"batch{}\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"{}\" fill=\"{}\" stroke=\"{}\" stroke-width=\"{}\"><title>{}</title></circle>",
            if moved { " moved" } else { "" },
            px(q.x),
            py(q.y),
            if moved { 4.5 } else { 3.5 },
            suspicion_colour(q.suspicion),
            if moved { "#000000" } else { "none" },
            if moved { 1.5 } else { 0.0 },
            html_escape(&title)
        );
    }
    let _ = writeln!(h, "</svg>");
}
