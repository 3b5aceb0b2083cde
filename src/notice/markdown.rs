//! The Markdown rendering of a notice, for the vendor: what happened to the file it delivered, why, and
//! what to do next.

use std::fmt::Write as _;

use chrono::SecondsFormat;

use super::{code_text, item_codes, DecidedBy, Notice, NoticeSettings, SUSPICION_SENTENCE};
use crate::text::sanitize_text;

impl Notice {
    /// The Markdown rendering, written for the vendor: what happened to the file it delivered, why, and
    /// what to do next. Vendor-supplied strings (file name, item ids, labels, columns) are sanitised, cut to
    /// `max_string_chars` and shown as code spans ([`md_code`]), which Markdown renders literally;
    /// labelweir's own sentences are escaped only where Markdown would read them as markup ([`md_text`])
    /// and never cut.
    pub fn to_markdown(&self, settings: &NoticeSettings) -> String {
        let cap = settings.max_string_chars;
        let code = |s: &str| md_code(s, cap, false);
        let cell = |s: &str| md_code(s, cap, true);
        let file = self.file_name.as_deref().map(code);
        let mut md = String::new();
        match &file {
            Some(f) => {
                let _ = writeln!(md, "# {}: {f}\n", self.title);
            }
            None => {
                let _ = writeln!(md, "# {}\n", self.title);
            }
        }
        let _ = writeln!(
            md,
            "About your file {}, received {} as batch {}:\n\n{}\n",
            file.as_deref().unwrap_or("(name unknown)"),
            self.received_at.to_rfc3339_opts(SecondsFormat::Secs, true),
            code(&self.batch_id),
            md_text(&self.detail)
        );
        let step = self.next_step_for();
        let _ = writeln!(md, "## What to do next\n");
        let _ = writeln!(md, "{}\n", md_text(&step.text));
        let appeal = self.appeal_for();
        let _ = writeln!(
            md,
            "Reference: {}. {}\n",
            code(&appeal.reference),
            md_text(&appeal.text)
        );
        if self.caution_applies() {
            let _ = writeln!(md, "> **Note.** {}\n", md_text(SUSPICION_SENTENCE));
        }
        if !self.reasons.is_empty() {
            let _ = writeln!(md, "## Why\n");
            for r in &self.reasons {
                let mut line = format!("- `{}`: {}", code_text(&r.code), md_text(&r.detail));
                match (r.row, &r.column) {
                    (Some(row), Some(c)) => {
                        let _ = write!(line, " (data row {row}, column {})", code(c));
                    }
                    (Some(row), None) => {
                        let _ = write!(line, " (data row {row})");
                    }
                    (None, Some(c)) => {
                        let _ = write!(line, " (column {})", code(c));
                    }
                    (None, None) => {}
                }
                let _ = writeln!(md, "{line}");
            }
        }
        self.markdown_items(&mut md, &cell);
        let _ = writeln!(md, "\n## Details\n\n| | |\n|---|---|");
        let _ = writeln!(md, "| Verdict | {} |", self.verdict.as_str());
        let who = match self.decided_by {
            DecidedBy::Policy => "automatic policy",
            DecidedBy::Reviewer => "reviewer",
        };
        let _ = writeln!(md, "| Decided by | {who} |");
        let _ = writeln!(md, "| Vendor | {} |", cell(&self.vendor));
        if let Some(f) = &self.file_name {
            let _ = writeln!(md, "| File | {} |", cell(f));
        }
        let _ = writeln!(md, "| Batch | {} |", cell(&self.batch_id));
        if let Some(h) = &self.sha256 {
            let _ = writeln!(md, "| SHA-256 | {} |", cell(h));
        }
        let _ = writeln!(
            md,
            "| Received | {} |",
            self.received_at.to_rfc3339_opts(SecondsFormat::Secs, true)
        );
        let _ = writeln!(
            md,
            "| Decided | {} |",
            self.decided_at.to_rfc3339_opts(SecondsFormat::Secs, true)
        );
        if let Some(t) = self.items_total {
            let _ = writeln!(md, "| Items in batch | {t} |");
        }
        if let Some(d) = &self.duplicate_of {
            let _ = writeln!(md, "| First delivered as batch | {} |", cell(d));
        }
        if let Some(c) = self.repair_cost {
            let _ = writeln!(md, "| Repair cost | {c:.4} |");
        }
        md
    }

    /// The items section of the Markdown rendering.
    fn markdown_items(&self, md: &mut String, cell: &dyn Fn(&str) -> String) {
        if self.items.is_empty() {
            if self.items_listed_total > 0 {
                let total = self
                    .items_total
                    .map_or(String::new(), |t| format!(" of {t}"));
                let _ = writeln!(
                    md,
                    "\n## Items\n\n{}{total} {} in doubt and held for a reviewer's check. No item is named unless a reviewer discloses it.",
                    self.items_listed_total,
                    if self.items_listed_total == 1 { "item was" } else { "items were" }
                );
            }
            return;
        }
        let _ = writeln!(
            md,
            "\n## Items ({} of {} listed)\n",
            self.items.len(),
            self.items_listed_total
        );
        let mut header = String::from("| Data row | Item | Findings |");
        let mut rule = String::from("|---|---|---|");
        if self.disclosure.proposed_labels {
            header.push_str(" Proposed label |");
            rule.push_str("---|");
        }
        if self.disclosure.scores {
            header.push_str(" Suspicion |");
            rule.push_str("---|");
        }
        let _ = writeln!(md, "{header}\n{rule}");
        for it in &self.items {
            let codes: Vec<String> = it
                .reasons
                .iter()
                .map(|c| format!("`{}`", code_text(c)))
                .collect();
            let row_no = it.row.map_or(String::new(), |r| r.to_string());
            let mut row = format!("| {row_no} | {} | {} |", cell(&it.id), codes.join(", "));
            if self.disclosure.proposed_labels {
                let _ = write!(
                    row,
                    " {} |",
                    it.proposed_label.as_deref().map(cell).unwrap_or_default()
                );
            }
            if self.disclosure.scores {
                match it.suspicion {
                    Some(s) => {
                        let _ = write!(row, " {s:.3} |");
                    }
                    None => row.push_str(" |"),
                }
            }
            let _ = writeln!(md, "{row}");
        }
        let mut seen: Vec<&str> = Vec::new();
        for it in &self.items {
            for c in &it.reasons {
                if !seen.contains(&c.as_str()) {
                    seen.push(c);
                }
            }
        }
        let _ = writeln!(md);
        for c in seen {
            if let Some(text) = item_code_meaning(c) {
                let _ = writeln!(md, "- `{}`: {text}", code_text(c));
            }
        }
        if self.items_truncated {
            let _ = writeln!(
                md,
                "\nThe list was cut; the JSON notice gives the total count."
            );
        }
    }
}

/// What an item reason code means, in the vendor's terms.
pub fn item_code_meaning(code: &str) -> Option<&'static str> {
    Some(match code {
        item_codes::LABEL_SUSPECTED => {
            "the label looks wrong to labelweir's checks; a reviewer looks at it."
        }
        item_codes::CONTRADICTS_TRUSTED => {
            "the label disagrees with the plant's expert-verified items of this kind."
        }
        item_codes::UNLIKE_SIMILAR => "items that look like this one mostly carry another label.",
        item_codes::EXCLUDED_BY_REVIEWER => "a reviewer left the item out of the training pool.",
        item_codes::RELABELED_BY_REVIEWER => "a reviewer changed the item's label.",
        _ => return None,
    })
}

/// A vendor string as a Markdown code span: sanitised and cut to `max_chars`, fenced with one backtick
/// more than its longest run of backticks (CommonMark 0.31, "Code spans"), padded with a space where it
/// starts or ends with a backtick. Inside a GFM table cell a `|` is written `\|` (GFM spec, "Tables":
/// the escape works inside code spans too). Empty strings become `` ` ` ``.
pub fn md_code(s: &str, max_chars: usize, in_table: bool) -> String {
    let mut clean = sanitize_text(s, max_chars);
    if in_table {
        clean = clean.replace('|', "\\|");
    }
    let mut longest = 0;
    let mut run = 0;
    for c in clean.chars() {
        run = if c == '`' { run + 1 } else { 0 };
        longest = longest.max(run);
    }
    if clean.is_empty() {
        return "` `".to_string();
    }
    let fence = "`".repeat(longest + 1);
    let pad = clean.starts_with('`') || clean.ends_with('`');
    let sp = if pad { " " } else { "" };
    format!("{fence}{sp}{clean}{sp}{fence}")
}

/// labelweir's own sentence (which may quote vendor strings) as Markdown text: unsafe characters removed,
/// nothing cut below 4,000 characters, and a backslash only before the characters that could start
/// markup inline (`\\`, `` ` ``, `*`, `[`, `]`, `<`, `>`, `|`, `&`, `~`, and `_` at a word edge) — not
/// before ordinary punctuation such as `.`, `-`, `:` or `(`.
pub fn md_text(s: &str) -> String {
    let clean: Vec<char> = sanitize_text(s, 4000).chars().collect();
    let mut out = String::with_capacity(clean.len() + 8);
    for (i, &c) in clean.iter().enumerate() {
        let edge = |j: Option<usize>| {
            j.and_then(|j| clean.get(j))
                .is_none_or(|c| !c.is_alphanumeric())
        };
        let escape = match c {
            '\\' | '`' | '*' | '[' | ']' | '<' | '>' | '|' | '&' | '~' => true,
            '_' => edge(i.checked_sub(1)) || edge(Some(i + 1)),
            _ => false,
        };
        if escape {
            out.push('\\');
        }
        out.push(c);
    }
    out
}
