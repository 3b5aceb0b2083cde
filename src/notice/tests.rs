//! Unit tests of vendor notices.

use super::*;
use crate::policy::{decide, PolicySettings, VendorHistory};
use chrono::TimeZone;

fn batch() -> BatchRef {
    BatchRef {
        batch_id: "b-000042".into(),
        vendor: "sortright".into(),
        file_name: Some("line3_shift2.csv".into()),
        sha256: Some("ab".repeat(32)),
        received_at: Utc.with_ymd_and_hms(2026, 3, 1, 8, 0, 0).unwrap(),
        decided_at: Utc.with_ymd_and_hms(2026, 3, 1, 8, 0, 2).unwrap(),
    }
}

fn quarantined() -> Notice {
    let d = decide(
        &PolicySettings::default(),
        &VendorHistory::default(),
        0.3,
        0.2,
    );
    let items = vec![
        NoticeItem {
            row: None,
            id: "=HYPERLINK(\"http://x\")".into(),
            reasons: vec![item_codes::LABEL_SUSPECTED.into()],
            proposed_label: Some("PET".into()),
            suspicion: Some(0.93),
        },
        NoticeItem {
            row: None,
            id: "item-7".into(),
            reasons: vec![item_codes::LABEL_SUSPECTED.into()],
            proposed_label: Some("glass".into()),
            suspicion: Some(0.81),
        },
    ];
    Notice::for_decision(batch(), &d, 0.3, 50, items)
}

// OWASP, "CSV Injection" (owasp.org/www-community/attacks/CSV_Injection): the cell-level cases are in
// `text::tests`; this one checks the writer's quoting on a whole notice.
#[test]
fn csv_output_quotes_always_and_doubles_quotes_owasp_example() {
    // OWASP's worked example (same page, from memory): the cell `=1+2";=1+2` must come out as
    // `"'=1+2"";=1+2"` — quoted, a leading single quote, the embedded quote doubled.
    let mut n = Notice::new(NoticeVerdict::Rejected, DecidedBy::Reviewer, batch());
    n.items.push(NoticeItem {
        row: None,
        id: "=1+2\";=1+2".into(),
        reasons: vec!["label_suspected".into()],
        proposed_label: None,
        suspicion: None,
    });
    let csv = String::from_utf8(n.to_csv().unwrap()).unwrap();
    let line = csv.lines().nth(1).unwrap();
    assert_eq!(line, "\"b-000042\",\"'=1+2\"\";=1+2\",\"label_suspected\"");
    // Read back with a standard CSV reader: the value is the neutralised text, one cell.
    let mut r = csv::Reader::from_reader(csv.as_bytes());
    let rec = r.records().next().unwrap().unwrap();
    assert_eq!(&rec[1], "'=1+2\";=1+2");
    assert_eq!(rec.len(), 3);
}

#[test]
fn default_disclosure_hides_scores_and_proposed_labels() {
    let n = quarantined().redacted(&NoticeSettings::default());
    assert_eq!(n.verdict, NoticeVerdict::Quarantined);
    assert!(n.repair_cost.is_none());
    assert!(n
        .items
        .iter()
        .all(|i| i.suspicion.is_none() && i.proposed_label.is_none()));
    assert_eq!(n.items.len(), 2);
    let json = serde_json::to_string(&n).unwrap();
    assert!(!json.contains("0.93") && !json.contains("PET"), "{json}");
    // The policy's numbers are gone from the reasons too.
    assert!(!json.contains("0.3000"), "{json}");
    assert!(n.reasons.iter().any(|r| r.code == "cold_start_repair_cost"));
    assert!(json.contains(SUSPICION_SENTENCE));
}

#[test]
fn reviewer_can_disclose_proposed_labels_and_settings_can_disclose_scores() {
    let mut n = quarantined();
    n.disclosure.by_reviewer = true;
    n.disclosure.proposed_labels = true;
    let r = n.redacted(&NoticeSettings::default());
    assert_eq!(r.items[0].proposed_label.as_deref(), Some("PET"));
    assert!(r.items[0].suspicion.is_none());
    let s = NoticeSettings {
        disclose_scores: true,
        ..NoticeSettings::default()
    };
    let r = quarantined().redacted(&s);
    assert_eq!(r.items[0].suspicion, Some(0.93));
    assert_eq!(r.repair_cost, Some(0.3));
    assert!(r.items[0].proposed_label.is_none());
}

#[test]
fn items_are_capped() {
    let mut n = quarantined();
    n.items = (0..10)
        .map(|i| NoticeItem {
            row: None,
            id: format!("i{i}"),
            reasons: vec!["label_suspected".into()],
            proposed_label: None,
            suspicion: None,
        })
        .collect();
    n.items_listed_total = 10;
    let r = n.redacted(&NoticeSettings {
        max_items: 3,
        ..NoticeSettings::default()
    });
    assert_eq!(r.items.len(), 3);
    assert!(r.items_truncated);
    assert_eq!(r.items_listed_total, 10);
}

#[test]
fn markdown_shows_vendor_strings_literally_and_own_sentences_without_backslashes() {
    let mut n = quarantined();
    // Bidi override (U+202E) to reverse displayed text, a newline to break out of the table,
    // Markdown/HTML syntax to inject a link and a script tag, backticks to break out of a code span.
    n.file_name = Some("evil\u{202E}gpj.csv\n# Injected heading".into());
    n.items[1].id = "[click](http://evil.example) <script>alert(1)</script> | x ``y".into();
    let md = n
        .redacted(&NoticeSettings::default())
        .to_markdown(&NoticeSettings::default());
    assert!(!md.contains('\u{202E}'));
    assert!(!md.contains("\n# Injected"), "{md}");
    // Vendor strings are code spans (CommonMark: literal text), fenced longer than their backtick runs;
    // in a table cell the pipe is escaped so the row keeps its cells (GFM "Tables").
    assert!(
        md.contains("```[click](http://evil.example) <script>alert(1)</script> \\| x ``y```"),
        "{md}"
    );
    let row = md.lines().find(|l| l.contains("click")).unwrap();
    let unescaped = row
        .char_indices()
        .filter(|&(i, c)| c == '|' && !row[..i].ends_with('\\'))
        .count();
    assert_eq!(unescaped, 4, "three cells: {row}");
    // labelweir's own sentences carry no backslash litter and are never cut.
    let own: Vec<&str> = md
        .lines()
        .filter(|l| !l.starts_with('|') && !l.contains('`'))
        .collect();
    assert!(own.iter().all(|l| !l.contains('\\')), "{own:#?}");
    assert!(md.contains(SUSPICION_SENTENCE), "{md}");
    assert!(!md.contains('…'), "nothing of ours is cut: {md}");
    assert!(md.contains("## What to do next"), "{md}");
}

#[test]
fn md_text_escapes_only_what_starts_markup() {
    // CommonMark 0.31 "Backslash escapes": any ASCII punctuation may be escaped; only these need it here.
    assert_eq!(
        md_text("max_repair_cost: 0.5 (row 3)."),
        "max_repair_cost: 0.5 (row 3)."
    );
    assert_eq!(
        md_text("a *b* [c](d) <e> _f_"),
        "a \\*b\\* \\[c\\](d) \\<e\\> \\_f\\_"
    );
    assert_eq!(md_code("a`b", 120, false), "``a`b``");
    assert_eq!(md_code("`", 120, false), "`` ` ``");
    assert_eq!(md_code("", 120, false), "` `");
}

#[test]
fn caution_and_next_step_follow_the_verdict() {
    let m = Notice::malformed(
        batch(),
        vec![NoticeReason::new("missing_column", "no column id")],
    )
    .redacted(&NoticeSettings::default());
    assert!(m.suspicion_notice.is_none());
    assert_eq!(m.next_step.action, NextAction::FixAndResend);
    let md = m.to_markdown(&NoticeSettings::default());
    assert!(!md.contains("suspicion"), "{md}");
    let d = Notice::duplicate(batch(), "b-000001").redacted(&NoticeSettings::default());
    assert!(d.suspicion_notice.is_none());
    assert_eq!(d.next_step.action, NextAction::None);
    let q = quarantined().redacted(&NoticeSettings::default());
    assert_eq!(q.suspicion_notice.as_deref(), Some(SUSPICION_SENTENCE));
    assert_eq!(q.appeal.reference, "line3_shift2.b-000042");
    let mut r = quarantined();
    r.verdict = NoticeVerdict::Rejected;
    let r = r.redacted(&NoticeSettings::default());
    assert_eq!(r.next_step.action, NextAction::FixAndResend);
    assert_eq!(r.appeal.reference, "line3_shift2.b-000042.rejected");
    assert!(r.appeal.text.contains("line3_shift2.b-000042.rejected"));
}

#[test]
fn notice_json_round_trips_and_uses_rfc3339_utc() {
    let n = quarantined().redacted(&NoticeSettings::default());
    let v = serde_json::to_value(&n).unwrap();
    assert_eq!(v["type"], "urn:labelweir:notice:quarantined");
    assert_eq!(v["instance"], "urn:labelweir:batch:b-000042:quarantined");
    assert_eq!(v["received_at"], "2026-03-01T08:00:00.000Z");
    let back: Notice = serde_json::from_value(v).unwrap();
    assert_eq!(back, n);
}

#[test]
fn write_notice_is_atomic_and_names_files_by_stem() {
    let dir = tempfile::tempdir().unwrap();
    let vd = dir.path().join("notices").join("sortright");
    let paths = write_notice(&vd, &quarantined(), &NoticeSettings::default()).unwrap();
    let names: Vec<String> = paths
        .iter()
        .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
        .collect();
    assert_eq!(
        names,
        [
            "line3_shift2.b-000042.json",
            "line3_shift2.b-000042.md",
            "line3_shift2.b-000042.items.csv"
        ]
    );
    let mut rej = quarantined();
    rej.verdict = NoticeVerdict::Rejected;
    let paths = write_notice(&vd, &rej, &NoticeSettings::default()).unwrap();
    assert!(paths[0].ends_with("line3_shift2.b-000042.rejected.json"));
    // No temporary files are left behind.
    let left: Vec<_> = std::fs::read_dir(&vd)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with('.'))
        .collect();
    assert!(left.is_empty(), "{left:?}");
    let mut bad = quarantined();
    bad.batch_id = "../escape".into();
    assert!(write_notice(&vd, &bad, &NoticeSettings::default()).is_err());
}

#[test]
fn delivered_names_become_safe_stems() {
    assert_eq!(
        delivered_stem("line3 week14 (final).csv"),
        "line3-week14-final"
    );
    assert_eq!(delivered_stem("../../etc/passwd"), "passwd");
    assert_eq!(delivered_stem("über.csv"), "ber");
    assert_eq!(delivered_stem(".csv"), "csv");
    assert_eq!(delivered_stem("...."), "");
    let mut n = quarantined();
    n.file_name = Some("....".into());
    assert_eq!(n.file_stem(), "b-000042");
}

/// Issue 16: an old notice stays whole when a new write fails, and no reader ever sees a partial file
/// under the final name. The failure is injected by a folder squatting on the temporary name the writer
/// uses (`.<name>.tmp-<pid>`, see `fsx`), so the write fails before any rename. Planted defect it
/// catches: writing the final name in place (`std::fs::write`) instead of `fsx::write_atomic_all`.
#[test]
fn a_failed_notice_write_keeps_the_old_notice_whole_and_readers_never_see_a_partial_file() {
    let dir = tempfile::tempdir().unwrap();
    let vd = dir.path().join("sortright");
    let settings = NoticeSettings::default();
    let old = quarantined();
    let paths = write_notice(&vd, &old, &settings).unwrap();
    let before: Vec<Vec<u8>> = paths.iter().map(|p| std::fs::read(p).unwrap()).collect();
    // The second write fails: its temporary JSON file cannot be created.
    let squat = vd.join(format!(
        ".{}.json.tmp-{}",
        old.file_stem(),
        std::process::id()
    ));
    std::fs::create_dir(&squat).unwrap();
    std::fs::write(squat.join("x"), b"x").unwrap();
    let mut new = quarantined();
    new.detail = "a different detail".into();
    assert!(write_notice(&vd, &new, &settings).is_err());
    let after: Vec<Vec<u8>> = paths.iter().map(|p| std::fs::read(p).unwrap()).collect();
    assert_eq!(before, after, "the old notice is untouched");
    std::fs::remove_dir_all(&squat).unwrap();
    // A reader polling the final name while notices of different sizes are rewritten always sees a
    // whole JSON document.
    let json = paths[0].clone();
    let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let reader = {
        let stop = stop.clone();
        std::thread::spawn(move || {
            let mut reads = 0;
            while !stop.load(std::sync::atomic::Ordering::Relaxed) {
                let bytes = std::fs::read(&json).unwrap();
                serde_json::from_slice::<serde_json::Value>(&bytes)
                    .unwrap_or_else(|e| panic!("partial notice seen ({e}): {} bytes", bytes.len()));
                reads += 1;
            }
            reads
        })
    };
    for k in 0..200 {
        let mut n = quarantined();
        n.detail = "x".repeat(1 + (k % 7) * 5000);
        write_notice(&vd, &n, &settings).unwrap();
    }
    stop.store(true, std::sync::atomic::Ordering::Relaxed);
    let reads = reader.join().expect("reader saw only whole notices");
    assert!(reads > 0);
}

/// Issue 16, rename semantics: a reader that opened the old notice before a rewrite keeps reading the old
/// bytes through its handle (the new notice is a new file renamed over the name; the old inode lives on
/// until its last handle closes), while the name shows the new notice. Planted defect it catches (run
/// once): `write_notice` writing each file in place with `std::fs::write` instead of
/// `fsx::write_atomic_all` — the handle then reads the new, longer text (same inode, truncated and
/// rewritten) and the first assertion fails.
#[test]
fn an_open_handle_on_the_old_notice_keeps_reading_the_old_bytes_after_a_rewrite() {
    use std::io::Read;
    use std::os::unix::fs::MetadataExt;
    let dir = tempfile::tempdir().unwrap();
    let vd = dir.path().join("sortright");
    let settings = NoticeSettings::default();
    let paths = write_notice(&vd, &quarantined(), &settings).unwrap();
    let old: Vec<Vec<u8>> = paths.iter().map(|p| std::fs::read(p).unwrap()).collect();
    let mut handles: Vec<std::fs::File> = paths
        .iter()
        .map(|p| std::fs::File::open(p).unwrap())
        .collect();
    let mut new = quarantined();
    new.detail = "the second delivery from line 3 was scored again ".repeat(20);
    assert_eq!(write_notice(&vd, &new, &settings).unwrap(), paths);
    for ((p, h), old) in paths.iter().zip(&mut handles).zip(&old) {
        let mut through_handle = Vec::new();
        h.read_to_end(&mut through_handle).unwrap();
        assert!(
            through_handle == *old,
            "{}: the open handle no longer reads the old bytes",
            p.display()
        );
        assert_ne!(
            h.metadata().unwrap().ino(),
            std::fs::metadata(p).unwrap().ino(),
            "{}: the name points at a new file",
            p.display()
        );
    }
    // The JSON and Markdown carry the detail, so under the name they changed (the CSV lists only items).
    for p in &paths[..2] {
        let now = std::fs::read(p).unwrap();
        assert!(
            String::from_utf8_lossy(&now).contains("scored again"),
            "{}: the name shows the new notice",
            p.display()
        );
    }
}

/// The unprivileged uid and gid the permission tests run as (`nobody` on Debian, as in
/// `tests/it/harden.rs`).
const UNPRIVILEGED: u32 = 65534;

/// Run `f` on a new thread that holds uid and gid [`UNPRIVILEGED`] and no supplementary groups when the
/// test process is root (CI runs as root, and root passes every permission check these tests are about);
/// as the test's own non-root user otherwise. The kernel keeps credentials per thread: the raw system
/// calls change only this thread, whereas glibc's `setresuid()` would change every thread of the test
/// process. Leaving root this way also clears the thread's capabilities (capabilities(7), "Effect of user
/// ID changes on capabilities"), so `CAP_DAC_OVERRIDE` is gone too.
fn as_unprivileged<T: Send + 'static>(f: impl FnOnce() -> T + Send + 'static) -> T {
    std::thread::spawn(move || {
        if rustix::process::getuid().is_root() {
            let id = libc::c_long::from(UNPRIVILEGED);
            // SAFETY: plain system calls with integer arguments and a null list of zero groups.
            unsafe {
                assert_eq!(
                    libc::syscall(libc::SYS_setgroups, 0, std::ptr::null::<libc::gid_t>()),
                    0
                );
                assert_eq!(libc::syscall(libc::SYS_setresgid, id, id, id), 0);
                assert_eq!(libc::syscall(libc::SYS_setresuid, id, id, id), 0);
            }
            assert_eq!(rustix::process::getuid().as_raw(), UNPRIVILEGED);
        }
        assert!(!rustix::process::geteuid().is_root());
        f()
    })
    .join()
    .unwrap_or_else(|e| std::panic::resume_unwind(e))
}

/// Issue 16: a rewrite that cannot create its temporary files (the vendor's notice folder is read-only
/// for the daemon's non-root user) fails with `PermissionDenied` and leaves the old notice whole, with no
/// temporary file behind. The old files themselves are left writable by anyone, so only a writer that
/// goes through a new name and a rename is stopped by the folder. Planted defect it catches (run once):
/// `write_notice` writing each file in place with `std::fs::write` — the unprivileged write then
/// succeeds, overwriting the old notice, and `unwrap_err` fails.
#[test]
fn a_rewrite_refused_by_a_read_only_folder_leaves_the_old_notice_whole() {
    use std::os::unix::fs::PermissionsExt;
    let mode = |p: &std::path::Path, m: u32| {
        std::fs::set_permissions(p, std::fs::Permissions::from_mode(m)).unwrap();
    };
    let dir = tempfile::tempdir().unwrap();
    mode(dir.path(), 0o755);
    let vd = dir.path().join("sortright");
    let settings = NoticeSettings::default();
    let paths = write_notice(&vd, &quarantined(), &settings).unwrap();
    for p in &paths {
        mode(p, 0o666);
    }
    mode(&vd, 0o555);
    let before: Vec<Vec<u8>> = paths.iter().map(|p| std::fs::read(p).unwrap()).collect();
    let r = {
        let vd = vd.clone();
        as_unprivileged(move || {
            let mut new = quarantined();
            new.detail = "a rewrite that must not land".into();
            write_notice(&vd, &new, &settings).map_err(|e| e.kind())
        })
    };
    assert_eq!(r.unwrap_err(), io::ErrorKind::PermissionDenied);
    let after: Vec<Vec<u8>> = paths.iter().map(|p| std::fs::read(p).unwrap()).collect();
    assert_eq!(before, after, "the old notice is untouched");
    let mut names: Vec<String> = std::fs::read_dir(&vd)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(
        names,
        [
            "line3_shift2.b-000042.items.csv",
            "line3_shift2.b-000042.json",
            "line3_shift2.b-000042.md"
        ]
    );
    mode(&vd, 0o755);
}
