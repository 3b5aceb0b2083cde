//! Sections of the review page: the engine's signals in plain words, the projection's legend, the flagged
//! items grouped and explained, the labels the repair moved, and the commands to decide.

use std::fmt::Write as _;

use crate::store::BatchState;
use crate::text::html_escape;

use super::{Projection, ShowReport, NEGLIGIBLE_REPAIR_COST};

/// labelweir's own text (sentences, commands) for HTML element content: like [`html_escape`] but never
/// cut (up to 20,000 characters) and keeping line breaks, so that no sentence of ours ends in `…`.
pub(super) fn html_text(s: &str) -> String {
    s.split('\n')
        .map(|line| crate::text::html_escape_up_to(line, 20_000))
        .collect::<Vec<_>>()
        .join("\n")
}

/// Colours for the trusted items' classes, in the order of [`trusted_classes`] (repeating after ten).
const CLASS_COLOURS: [&str; 10] = [
    "#1a9870", "#d8600a", "#7468b0", "#d8318a", "#5f9f22", "#c99a00", "#8f6a25", "#4d4d4d",
    "#1aa6b7", "#9c3d3d",
];

/// The trusted items' classes in the projection, sorted.
pub(super) fn trusted_classes(p: &Projection) -> Vec<String> {
    let mut v: Vec<String> = p
        .points
        .iter()
        .filter(|q| q.group == "trusted")
        .map(|q| q.label.clone())
        .collect();
    v.sort();
    v.dedup();
    v
}

/// The colour of a trusted item's class.
pub(super) fn class_colour(classes: &[String], label: &str) -> &'static str {
    let k = classes.iter().position(|c| c == label).unwrap_or(0);
    CLASS_COLOURS[k % CLASS_COLOURS.len()]
}

/// The legend under the projection: every trusted class with its colour, the suspicion scale and the
/// ring that marks flagged items.
pub(super) fn legend(h: &mut String, p: &Projection) {
    let classes = trusted_classes(p);
    let _ = writeln!(h, "<ul class=\"legend\">");
    let _ = writeln!(
        h,
        "<li><strong>Squares: trusted items</strong> (expert-verified), coloured by class:</li>"
    );
    for c in &classes {
        let _ = writeln!(
            h,
            "<li><span class=\"sw\" style=\"background:{}\"></span> {}</li>",
            class_colour(&classes, c),
            html_escape(c)
        );
    }
    let _ = writeln!(
        h,
        "<li><strong>Circles: this batch's items</strong>, coloured by suspicion: <span class=\"sw dot\" style=\"background:{}\"></span> low, <span class=\"sw dot\" style=\"background:{}\"></span> high.</li>",
        super::page::suspicion_colour(Some(0.0)),
        super::page::suspicion_colour(Some(1.0))
    );
    let _ = writeln!(
        h,
        "<li><span class=\"sw dot ring\"></span> A black ring: a flagged item (its proposed label differs from the given one). Hover a mark for its id and labels.</li>"
    );
    let _ = writeln!(h, "</ul>");
}

/// The engine's signals in plain words.
pub(super) fn signals(h: &mut String, report: &ShowReport) {
    if report.signals.is_empty() {
        return;
    }
    let _ = writeln!(h, "<h2>What the engine's signals say</h2>\n<dl>");
    for n in &report.signals {
        let _ = writeln!(
            h,
            "<dt>{}: {}</dt><dd>{}</dd>",
            html_text(&n.name),
            html_text(&n.value),
            html_text(&n.meaning)
        );
    }
    let _ = writeln!(h, "</dl>");
}

/// The flagged items grouped by (given → proposed).
pub(super) fn groups(h: &mut String, report: &ShowReport) {
    let _ = writeln!(
        h,
        "<h2>Flagged items by given and proposed label</h2>\n<table id=\"groups\"><tr><th>Given label</th><th>Proposed label</th><th>Items</th><th>Mean suspicion</th><th>Nearest trusted items with the proposed label</th><th>First items</th></tr>"
    );
    for g in &report.suspect_groups {
        let (near, of) = g.trusted_nearby_proposed;
        let first: Vec<String> = g.ids.iter().take(8).map(|i| html_escape(i)).collect();
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{:.2}</td><td>{}</td><td>{}{}</td></tr>",
            html_escape(&g.label),
            html_escape(&g.proposed_label),
            g.ids.len(),
            g.mean_suspicion,
            if of > 0 {
                format!("{near} of {of}")
            } else {
                "-".into()
            },
            first.join(", "),
            if g.ids.len() > 8 { ", ..." } else { "" }
        );
    }
    let _ = writeln!(h, "</table>");
}

/// The most suspicious flagged items, each with its features against the class profiles, its nearest
/// trusted items and its signals.
pub(super) fn details(h: &mut String, report: &ShowReport) {
    if report.suspect_details.is_empty() {
        return;
    }
    let _ = writeln!(
        h,
        "<h2>Flagged items in detail ({} most suspicious)</h2>\n<p>For each: the features that most set the proposed class apart from the given one, against the mean of the trusted items of each class; the three nearest trusted items; and the engine's signals.</p>",
        report.suspect_details.len()
    );
    for d in &report.suspect_details {
        let _ = writeln!(
            h,
            "<h3 class=\"suspect\">{} (data row {}): given {}, proposed {}, suspicion {:.3}</h3>",
            html_escape(&d.id),
            d.row,
            html_escape(&d.label),
            html_escape(&d.proposed_label),
            d.suspicion
        );
        let _ = writeln!(
            h,
            "<table><tr><th>Feature</th><th>This item</th><th>Trusted {} (given) mean</th><th>Trusted {} (proposed) mean</th></tr>",
            html_escape(&d.label),
            html_escape(&d.proposed_label)
        );
        let num = |v: Option<f64>| v.map_or("-".to_string(), |x| format!("{x:.3}"));
        for f in &d.features {
            let _ = writeln!(
                h,
                "<tr><td>{}</td><td>{:.3}</td><td>{}</td><td>{}</td></tr>",
                html_escape(&f.feature),
                f.value,
                num(f.given_class_mean),
                num(f.proposed_class_mean)
            );
        }
        let _ = writeln!(h, "</table>");
        let near: Vec<String> = d
            .nearest_trusted
            .iter()
            .map(|t| {
                format!(
                    "{} ({}, distance {:.2})",
                    html_escape(&t.id),
                    html_escape(&t.label),
                    t.distance
                )
            })
            .collect();
        let _ = writeln!(h, "<p>Nearest trusted items: {}.", near.join("; "));
        if let Some([rs, rd, ad, w]) = d.signals {
            let _ = write!(
                h,
                " Repair signal {rs:.2}; reference model's doubt {rd:.2}; trusted-anchored doubt {ad:.2}; repair weight {w:.2}."
            );
        }
        let _ = writeln!(h, "</p>");
    }
}

/// The labels the repair itself moved, or why none are listed.
pub(super) fn repair_moved(h: &mut String, report: &ShowReport) {
    let cost = report.batch.scores.as_ref().map(|s| s.repair_cost);
    if let Some(c) = cost.filter(|c| *c < NEGLIGIBLE_REPAIR_COST) {
        let _ = writeln!(
            h,
            "<h2>Labels the repair moved</h2>\n<p>None: the repair cost {c:.4} is negligible; the trusted items ask for no change to this batch.</p>"
        );
        return;
    }
    let _ = writeln!(
        h,
        "<h2>Labels the repair moved ({})</h2>\n<table id=\"repair-moved\"><tr><th>Item</th><th>Given label</th><th>Moved to</th></tr>",
        report.repair_moved.len()
    );
    for m in &report.repair_moved {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td></tr>",
            html_escape(&m.id),
            html_escape(&m.label),
            html_escape(&m.proposed_label)
        );
    }
    let _ = writeln!(h, "</table>");
}

/// The exact commands to decide, for a reviewer to copy.
pub(super) fn commands(h: &mut String, report: &ShowReport) {
    let dir = report
        .workspace
        .as_ref()
        .map_or("DIR".to_string(), |p| p.display().to_string());
    let q = |s: &str| {
        if !s.is_empty()
            && s.chars()
                .all(|c| c.is_ascii_alphanumeric() || "/._-+:=@".contains(c))
        {
            s.to_string()
        } else {
            format!("'{}'", s.replace('\'', "'\\''"))
        }
    };
    let (d, b) = (q(&dir), q(&report.batch.id));
    let lines: Vec<String> = match report.batch.state {
        BatchState::Quarantined => vec![
            format!("labelweir quarantine release {d} {b} --accept-proposed --exclude-flagged --dry-run --reason '...'"),
            format!("labelweir quarantine release {d} {b} --accept-proposed --exclude-flagged --reason '...'"),
            format!("labelweir quarantine release {d} {b} --exclude ID --relabel ID=LABEL --reason '...'"),
            format!("labelweir quarantine reject {d} {b} --reason '...'"),
        ],
        BatchState::Accepted | BatchState::Released => vec![
            format!("labelweir quarantine held {d}"),
            format!("labelweir quarantine withdraw {d} {b} --reason '...'"),
        ],
        _ => Vec::new(),
    };
    if lines.is_empty() {
        return;
    }
    let _ = writeln!(
        h,
        "<h2>To decide</h2>\n<p>Preview a release first (<code>--dry-run</code> records nothing). Every decision needs a reason and is kept in the audit trail.</p>\n<pre id=\"commands\">{}</pre>",
        html_text(&lines.join("\n"))
    );
}
