//! What reviewers and vendors read, through the binary, on the shipped fixtures (`fixtures/`, with their
//! planted errors in `fixtures/truth/`): safe releases (preview, confidence floor, exclusions), notices a
//! vendor can act on, `quarantine show` and the review page read in a real headless browser.
//!
//! Issue 15 "Done when": (1) `release_previews_and_the_default_fixes_more_labels_than_it_breaks_on_the_fixtures`;
//! (2) `a_vendor_can_tell_from_its_notice_folder_what_happened_why_and_what_to_do_next` (and, for atomic
//! notice writes, `notice::tests::a_failed_notice_write_keeps_the_old_notice_whole_and_readers_never_see_a_partial_file`);
//! (3) `show_explains_the_signals_and_keeps_accepted_batches_apart_from_held_ones` and
//! `the_review_page_reads_right_in_a_headless_browser`.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use serde_json::Value;

use crate::util::*;

const T: Duration = Duration::from_secs(180);

/// The three fixture batches with planted errors, quarantined in the fixture workspace.
const FLIPPED: [&str; 3] = [
    "batch-wet-cardboard-as-paper.csv",
    "batch-region-flip.csv",
    "batch-uniform-flip.csv",
];

fn fixture(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(rel)
}

fn ok_json(args: &[&str]) -> Value {
    let out = run_bin(args);
    assert!(
        out.status.success(),
        "labelweir {args:?} failed ({:?}): {}",
        out.status.code(),
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!(
            "labelweir {args:?}: not JSON ({e}): {}",
            String::from_utf8_lossy(&out.stdout)
        )
    })
}

fn text(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// A workspace on the fixtures' trusted set (vendor `acme`), fed by a running daemon, one file at a time,
/// with: `pool.csv` (the pool, accepted, released if held), the three batches with planted errors (held),
/// `batch-clean.csv`, the same bytes again as `again-clean.csv` (a duplicate) and `bad.csv` (a missing
/// column); batch ids `b00000001` to `b00000007` in that order. This is the README's worked session.
/// Returns the stopped workspace and the batch id of each delivered file name.
fn fixture_workspace() -> (Ws, HashMap<String, String>) {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("ws");
    let out = run_bin(&[
        "init",
        &dir.display().to_string(),
        "--trusted",
        &fixture("trusted.csv").display().to_string(),
        "--vendor",
        "acme",
        "--by",
        "expert-a",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let ws = Ws { tmp, dir };
    ws.edit_config(&[
        ("quiet_period_ms = 2000", "quiet_period_ms = 150"),
        ("min_free_bytes = 67108864", "min_free_bytes = 1"),
        ("flagged = \"hold\"", "flagged = \"enter\""),
    ]);
    let d = Daemon::start(&ws);
    let read = |rel: &str| std::fs::read(fixture(rel)).unwrap();
    ws.deliver("acme", "pool.csv", &read("pool.csv"));
    ws.wait_filed(1, T);
    let dir_s = ws.dir.display().to_string();
    let held = ok_json(&["quarantine", "list", &dir_s, "--json"]);
    if let Some(p) = held.as_array().unwrap().first() {
        let id = p["batch_id"].as_str().unwrap();
        ok_json(&[
            "quarantine",
            "release",
            &dir_s,
            id,
            "--by",
            "rev",
            "--reason",
            "seed pool",
            "--json",
        ]);
    }
    // One at a time, so that batch ids follow the order below (the README's session quotes them).
    let rest = [
        (FLIPPED[0], read(FLIPPED[0])),
        (FLIPPED[1], read(FLIPPED[1])),
        (FLIPPED[2], read(FLIPPED[2])),
        ("batch-clean.csv", read("batch-clean.csv")),
        ("again-clean.csv", read("batch-clean.csv")),
        ("bad.csv", read("bad/missing-column.csv")),
    ];
    for (k, (name, bytes)) in rest.iter().enumerate() {
        ws.deliver("acme", name, bytes);
        ws.wait_settled(2 + k, T);
    }
    // Every delivery's first notice, read back: delivered name -> batch id.
    let nd = ws.path("notices").join("acme");
    let t = Instant::now();
    let ids = loop {
        let ids: HashMap<String, String> = std::fs::read_dir(&nd)
            .unwrap()
            .flatten()
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|n| !n.starts_with('.') && n.ends_with(".json") && n.matches('.').count() == 2)
            .map(|n| {
                let v: Value =
                    serde_json::from_slice(&std::fs::read(nd.join(&n)).unwrap()).unwrap();
                (
                    v["file_name"].as_str().unwrap().to_string(),
                    v["batch_id"].as_str().unwrap().to_string(),
                )
            })
            .collect();
        if ids.len() == 7 {
            break ids;
        }
        assert!(t.elapsed() < T, "notices so far: {ids:?}");
        std::thread::sleep(Duration::from_millis(100));
    };
    assert!(d.stop().success());
    (ws, ids)
}

/// `id -> true label` of a fixture batch.
fn truth(file: &str) -> HashMap<String, String> {
    let mut r = csv::Reader::from_path(fixture(&format!("truth/{file}"))).unwrap();
    r.records()
        .map(|rec| {
            let rec = rec.unwrap();
            (rec[0].to_string(), rec[1].to_string())
        })
        .collect()
}

/// (fixed, broken) among a release's relabelings: fixed when the new label is the true one, broken when
/// the old one was.
fn fixed_broken(relabeled: &Value, truth: &HashMap<String, String>) -> (usize, usize) {
    let mut fixed = 0;
    let mut broken = 0;
    for r in relabeled.as_array().unwrap() {
        let (id, from, to) = (
            r[0].as_str().unwrap(),
            r[1].as_str().unwrap(),
            r[2].as_str().unwrap(),
        );
        let t = truth[id].as_str();
        if t == to {
            fixed += 1;
        } else if t == from {
            broken += 1;
        }
    }
    (fixed, broken)
}

/// Issue 15 item 1. `--accept-proposed` takes only proposals at or above the confidence floor (default
/// 0.7), says which weaker ones it did not take, `--dry-run` records nothing, `--exclude-flagged` and
/// `--exclude-from` leave items out. Measured against the planted errors (`fixtures/truth/`): on every
/// fixture batch the default fixes more labels than it breaks; the README quotes these figures. Planted
/// defect it catches: a floor of 0 as the default (the wet-cardboard batch then breaks more than it fixes).
#[test]
fn release_previews_and_the_default_fixes_more_labels_than_it_breaks_on_the_fixtures() {
    let (ws, ids) = fixture_workspace();
    let dir = ws.dir.display().to_string();
    let preview = |id: &str, extra: &[&str]| {
        let mut args = vec![
            "quarantine",
            "release",
            &dir,
            id,
            "--by",
            "rev",
            "--reason",
            "preview",
            "--accept-proposed",
            "--dry-run",
            "--json",
        ];
        args.extend_from_slice(extra);
        ok_json(&args)
    };
    let mut previews = HashMap::new();
    for f in FLIPPED {
        let id = &ids[f];
        let v = preview(id, &[]);
        assert_eq!(v["dry_run"], true);
        assert_eq!(v["state"], "quarantined");
        assert_eq!(v["min_confidence"], 0.7);
        let (fixed, broken) = fixed_broken(&v["relabeled"], &truth(f));
        let skipped = v["skipped_weak"].as_array().unwrap();
        eprintln!(
            "{f}: default floor 0.7 relabels {} (fixed {fixed}, broken {broken}); {} weak proposals not taken",
            v["relabeled"].as_array().unwrap().len(),
            skipped.len()
        );
        assert!(fixed > broken, "{f}: fixed {fixed}, broken {broken}");
        assert!(skipped
            .iter()
            .all(|s| s["confidence"].as_f64().unwrap() < 0.7));
        // Without a floor every proposal is taken: the default's plus the weak ones.
        let all = preview(id, &["--min-confidence", "0"]);
        assert_eq!(
            all["relabeled"].as_array().unwrap().len(),
            v["relabeled"].as_array().unwrap().len() + skipped.len(),
            "{f}"
        );
        let (af, ab) = fixed_broken(&all["relabeled"], &truth(f));
        eprintln!("{f}: with no floor: fixed {af}, broken {ab}");
        previews.insert(f, v);
    }
    // A preview records nothing: the three batches still wait and no release is in the audit trail.
    let list = ok_json(&["quarantine", "list", &dir, "--json"]);
    assert_eq!(list.as_array().unwrap().len(), 3, "{list}");
    let audit = text(&run_bin(&["audit", &dir, "--json"]));
    assert!(
        audit
            .lines()
            .all(|l| !l.contains("\"action\":\"release\"") || l.contains("seed pool")),
        "{audit}"
    );
    // The text preview says it is one and names the proposals it did not take.
    let wet = &ids[FLIPPED[0]];
    let out = run_bin(&[
        "quarantine",
        "release",
        &dir,
        wet,
        "--reason",
        "preview",
        "--accept-proposed",
        "--dry-run",
    ]);
    let said = text(&out);
    assert!(said.contains("preview, nothing recorded"), "{said}");
    if !previews[FLIPPED[0]]["skipped_weak"]
        .as_array()
        .unwrap()
        .is_empty()
    {
        assert!(
            said.contains("weak proposal") && said.contains("not taken"),
            "{said}"
        );
    }
    // A real release: strong proposals taken, weak ones and a listed item left out.
    let p = &previews[FLIPPED[0]];
    let named: HashSet<&str> = p["relabeled"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r[0].as_str().unwrap())
        .chain(
            p["skipped_weak"]
                .as_array()
                .unwrap()
                .iter()
                .map(|s| s["id"].as_str().unwrap()),
        )
        .collect();
    let wet_truth = truth(FLIPPED[0]);
    let mut plain: Vec<&String> = wet_truth
        .keys()
        .filter(|k| !named.contains(k.as_str()))
        .collect();
    plain.sort();
    let list_file = ws.tmp.path().join("leave-out.txt");
    std::fs::write(
        &list_file,
        format!("# checked on the line camera\n\n{}\n", plain[0]),
    )
    .unwrap();
    let rel = ok_json(&[
        "quarantine",
        "release",
        &dir,
        wet,
        "--by",
        "rev",
        "--reason",
        "strong proposals checked on the line camera",
        "--accept-proposed",
        "--exclude-flagged",
        "--exclude-from",
        &list_file.display().to_string(),
        "--json",
    ]);
    assert_eq!(rel["state"], "released");
    assert_eq!(rel["dry_run"], false);
    let excluded: HashSet<&str> = rel["excluded"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e.as_str().unwrap())
        .collect();
    assert!(excluded.contains(plain[0].as_str()));
    for s in p["skipped_weak"].as_array().unwrap() {
        assert!(excluded.contains(s["id"].as_str().unwrap()), "{s}");
    }
    assert_eq!(
        excluded.len(),
        p["skipped_weak"].as_array().unwrap().len() + 1
    );
    assert_eq!(
        rel["items_into_pool"].as_u64(),
        Some(300 - excluded.len() as u64)
    );
    assert_eq!(rel["relabeled"], p["relabeled"]);
    // Bad input is refused with the input exit code.
    let region = &ids[FLIPPED[1]];
    let out = run_bin(&[
        "quarantine",
        "release",
        &dir,
        region,
        "--reason",
        "x",
        "--accept-proposed",
        "--min-confidence",
        "1.5",
        "--dry-run",
    ]);
    assert_eq!(
        out.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let out = run_bin(&[
        "quarantine",
        "release",
        &dir,
        region,
        "--reason",
        "x",
        "--exclude-from",
        "/nonexistent/list",
    ]);
    assert_eq!(
        out.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// The first-verdict and review notices of one delivered file: `(json, markdown)` per file, by the
/// delivered file's stem in their names.
fn notices_for(nd: &Path, delivered: &str) -> Vec<(String, Value, String)> {
    let stem = delivered.trim_end_matches(".csv");
    let mut v: Vec<(String, Value, String)> = std::fs::read_dir(nd)
        .unwrap()
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with(&format!("{stem}.")) && n.ends_with(".json"))
        .map(|n| {
            let json: Value = serde_json::from_slice(&std::fs::read(nd.join(&n)).unwrap()).unwrap();
            let md = std::fs::read_to_string(nd.join(n.replace(".json", ".md"))).unwrap();
            (n, json, md)
        })
        .collect();
    v.sort_by(|a, b| a.0.cmp(&b.0));
    v
}

/// Issue 15 item 2: reading only its notice folder, a vendor can tell for each file it delivered what
/// happened, why, and what to do next; notices are named after the delivered file; the caution appears
/// only on scored content; the Markdown has no backslash litter and no cut sentence; the appeal reference
/// opens the batch in the review commands. Planted defects it catches: notices named by batch id only,
/// the caution on a parse error, the old escape-everything Markdown.
#[test]
fn a_vendor_can_tell_from_its_notice_folder_what_happened_why_and_what_to_do_next() {
    let (ws, ids) = fixture_workspace();
    let dir = ws.dir.display().to_string();
    let nd = ws.path("notices").join("acme");
    // A reviewer rejects the region batch, naming the items.
    let region = &ids["batch-region-flip.csv"];
    ok_json(&[
        "quarantine",
        "reject",
        &dir,
        region,
        "--by",
        "rev",
        "--reason",
        "labels shuffled by region",
        "--disclose-items",
        "--json",
    ]);
    crate::review::validate_notices(&nd);
    let expect = [
        ("batch-clean.csv", "accepted", "none"),
        ("again-clean.csv", "duplicate", "none"),
        ("bad.csv", "malformed", "fix_and_resend"),
        ("batch-region-flip.csv", "rejected", "fix_and_resend"),
    ];
    for (file, verdict, action) in expect {
        let all = notices_for(&nd, file);
        let (name, n, md) = all
            .iter()
            .find(|(_, n, _)| n["verdict"] == verdict)
            .unwrap_or_else(|| panic!("{file}: no {verdict} notice among {all:?}"));
        let id = n["batch_id"].as_str().unwrap();
        assert!(
            name.contains(&format!(".{id}.")),
            "{name}: named after the file and the batch"
        );
        assert_eq!(n["file_name"], file);
        assert_eq!(n["next_step"]["action"], action, "{name}");
        assert!(!n["next_step"]["text"].as_str().unwrap().is_empty());
        // The Markdown: the file's own name up front, what to do next, why.
        let first = md.lines().next().unwrap();
        assert!(first.contains(file), "{name}: {first}");
        assert!(md.contains("## What to do next"), "{md}");
        assert!(
            md.contains(n["next_step"]["text"].as_str().unwrap()),
            "{md}"
        );
        if verdict != "accepted" {
            assert!(md.contains("## Why"), "{md}");
        }
        // Nothing of ours is cut, and there is no backslash outside a quoted vendor string.
        assert!(!md.contains('…'), "{md}");
        for line in md.lines().filter(|l| !l.contains('`')) {
            assert!(!line.contains('\\'), "{name}: backslash litter: {line}");
        }
        // The caution only where something was judged.
        let cautioned = n.get("suspicion_notice").is_some();
        let judged = matches!(verdict, "rejected")
            || (verdict == "accepted" && n["items_listed_total"].as_u64() > Some(0));
        assert_eq!(cautioned, judged, "{name}");
        assert_eq!(md.contains("not proof"), judged, "{name}");
        // The appeal reference opens the batch in the review commands.
        let reference = n["appeal"]["reference"].as_str().unwrap();
        assert!(md.contains(reference), "{md}");
        let shown = ok_json(&["quarantine", "show", &dir, reference, "--no-html", "--json"]);
        assert_eq!(shown["batch"]["id"], id, "{reference}");
    }
    // The malformed notice points at the column; the duplicate's first delivery is a notice the vendor has.
    let bad = &notices_for(&nd, "bad.csv")[0].1;
    assert!(bad["reasons"][0]["column"].is_string(), "{bad}");
    let dup = notices_for(&nd, "again-clean.csv")
        .into_iter()
        .find(|(_, n, _)| n["verdict"] == "duplicate")
        .unwrap()
        .1;
    let first = dup["duplicate_of"].as_str().unwrap();
    assert_eq!(first, ids["batch-clean.csv"]);
    assert!(dup["reasons"][0]["detail"]
        .as_str()
        .unwrap()
        .contains(first));
    assert!(
        notices_for(&nd, "batch-clean.csv")
            .iter()
            .any(|(n, _, _)| n.contains(first)),
        "the first delivery's notice carries the id the duplicate cites"
    );
    // The rejected notice names items by data row, each with finding codes it explains.
    let rej = notices_for(&nd, "batch-region-flip.csv")
        .into_iter()
        .find(|(_, n, _)| n["verdict"] == "rejected")
        .unwrap();
    let items = rej.1["items"].as_array().unwrap();
    assert!(!items.is_empty());
    let known = [
        "contradicts_trusted_items",
        "unlike_similar_items",
        "label_suspected",
    ];
    let region_rows: HashMap<String, u64> = {
        let mut r = csv::Reader::from_path(fixture("batch-region-flip.csv")).unwrap();
        r.records()
            .enumerate()
            .map(|(i, rec)| (rec.unwrap()[0].to_string(), i as u64 + 1))
            .collect()
    };
    for it in items {
        let id = it["id"].as_str().unwrap();
        assert_eq!(it["row"].as_u64(), Some(region_rows[id]), "{it}");
        for c in it["reasons"].as_array().unwrap() {
            let c = c.as_str().unwrap();
            assert!(known.contains(&c), "{c}");
            assert!(
                rej.2.contains(&format!("- `{c}`: ")),
                "{c} explained:\n{}",
                rej.2
            );
        }
    }
    // The review notice of a rejection asks for a fix or an appeal, quoting a reference with the verdict.
    assert!(rej.1["appeal"]["reference"]
        .as_str()
        .unwrap()
        .ends_with(".rejected"));
}

/// Issue 15 item 3 (terminal side) and issue 10 item 5: `quarantine show` explains the engine's signals in
/// plain words, groups the flagged items, gives the commands to decide; for an accepted batch it does
/// not say "why it was held", and where the repair cost is negligible it lists no item under "labels
/// the repair moved". Planted defect it catches: the old heading for every state.
#[test]
fn show_explains_the_signals_and_keeps_accepted_batches_apart_from_held_ones() {
    let (ws, ids) = fixture_workspace();
    let dir = ws.dir.display().to_string();
    let wet = &ids["batch-wet-cardboard-as-paper.csv"];
    let said = text(&run_bin(&["quarantine", "show", &dir, wet, "--no-html"]));
    for want in [
        "why it was held",
        "what the engine's signals say",
        "repair signal",
        "reference model's doubt",
        "trusted-anchored doubt",
        "trusted neighbours' doubt",
        "repair weight",
        "trusted audit",
        "labeled paper, proposed cardboard",
        "quarantine release",
        "--dry-run",
        "quarantine reject",
        "not proof",
    ] {
        assert!(said.contains(want), "{want:?} missing:\n{said}");
    }
    let clean = &ids["batch-clean.csv"];
    let v = ok_json(&["quarantine", "show", &dir, clean, "--no-html", "--json"]);
    let cost = v["batch"]["scores"]["repair_cost"].as_f64().unwrap();
    let said = text(&run_bin(&["quarantine", "show", &dir, clean, "--no-html"]));
    assert!(!said.contains("why it was held"), "{said}");
    assert!(said.contains("how it was judged (accepted)"), "{said}");
    if cost < 0.005 {
        assert!(
            said.contains("labels the repair moved: none"),
            "repair cost {cost}:\n{said}"
        );
        assert_eq!(v["repair_moved"].as_array().unwrap().len(), 0);
    }
    assert!(said.contains("quarantine withdraw"), "{said}");
}

/// Issue 15 item 3: the review page, loaded from disk by Debian's chromium in headless mode (no network,
/// no scripts: the page has none and its CSP forbids them), reads right: a legend naming every trusted
/// class with its colour, the flagged items grouped by (given → proposed), per flagged item its features
/// against the class profiles and its nearest trusted items, the engine's signals in plain words, the
/// exact commands, and the whole caution. Assertions are on the DOM the browser built, not on pixels.
#[test]
#[cfg_attr(
    all(not(has_chromium), not(labelweir_ci)),
    ignore = "needs chromium (Debian package chromium: `bash .ci/run` installs it; or set CHROMIUM)"
)]
fn the_review_page_reads_right_in_a_headless_browser() {
    let chromium = tool(env!("LABELWEIR_TOOL_CHROMIUM"), "chromium");
    let (ws, ids) = fixture_workspace();
    let dir = ws.dir.display().to_string();
    let wet = &ids["batch-wet-cardboard-as-paper.csv"];
    let page = ws.tmp.path().join("wet.html");
    let out = run_bin(&[
        "quarantine",
        "show",
        &dir,
        wet,
        "--html",
        &page.display().to_string(),
    ]);
    assert!(out.status.success());
    let profile = ws.tmp.path().join("chromium-profile");
    let out = Command::new(chromium)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--no-first-run",
            "--disable-extensions",
            &format!("--user-data-dir={}", profile.display()),
            "--dump-dom",
        ])
        .arg(format!("file://{}", page.display()))
        .output()
        .unwrap();
    let dom = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        dom.contains("</html>"),
        "chromium produced no DOM ({:?}): {}",
        out.status.code(),
        String::from_utf8_lossy(&out.stderr)
    );
    // The browser's text (tags removed, entities decoded) is what a reviewer reads.
    let text = visible_text(&dom);
    for want in [
        "Squares: trusted items",
        "Circles: this batch's items",
        "A black ring: a flagged item",
        "Flagged items by given and proposed label",
        "Flagged items in detail",
        "Nearest trusted items:",
        "What the engine's signals say",
        "repair signal",
        "trusted audit",
        "To decide",
        "labelweir quarantine release",
        "--dry-run",
        "labelweir quarantine reject",
        labelweir::notice::SUSPICION_SENTENCE,
    ] {
        assert!(
            text.contains(want),
            "{want:?} missing from the page's text:\n{text}"
        );
    }
    // Every trusted class is in the legend, each with its own colour, and the squares use those colours.
    let classes: HashSet<String> = {
        let mut r = csv::Reader::from_path(fixture("trusted.csv")).unwrap();
        r.records().map(|x| x.unwrap()[1].to_string()).collect()
    };
    let legend = dom
        .split("class=\"legend\"")
        .nth(1)
        .unwrap()
        .split("</ul>")
        .next()
        .unwrap();
    let mut colours = HashSet::new();
    for c in &classes {
        let at = legend
            .find(&format!("</span> {c}</li>"))
            .unwrap_or_else(|| panic!("class {c} not in the legend: {legend}"));
        let colour = legend[..at].rsplit("background:").next().unwrap()[..7].to_string();
        assert!(
            dom.contains(&format!("fill=\"{colour}\" stroke=\"#212121\"")),
            "no trusted square in {colour} for {c}"
        );
        colours.insert(colour);
    }
    assert_eq!(colours.len(), classes.len(), "one colour per class");
    // The group of the planted error, and a detail section per detailed suspect.
    assert!(
        text.contains("paper cardboard"),
        "the paper -> cardboard group:\n{text}"
    );
    assert!(dom.matches("class=\"suspect\"").count() >= 5);
}

/// The text of an HTML document as a reader sees it: tags dropped, a few entities decoded, spaces squeezed.
fn visible_text(html: &str) -> String {
    let body = html.split("<body").nth(1).unwrap_or(html);
    let mut out = String::new();
    let mut in_tag = false;
    for c in body.chars() {
        match c {
            '<' => {
                in_tag = true;
                out.push(' ');
            }
            '>' => in_tag = false,
            _ if !in_tag => out.push(c),
            _ => {}
        }
    }
    let out = out
        .replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&#39;", "'")
        .replace("&amp;", "&");
    out.split_whitespace().collect::<Vec<_>>().join(" ")
}

/// Start `labelweir run` with extra arguments and environment, its stdout and stderr in `log`.
fn spawn_daemon(
    ws: &Ws,
    extra: &[&str],
    env: &[(&str, &str)],
    log: &Path,
) -> (std::process::Child, String) {
    let addr = free_addr().to_string();
    let f = std::fs::File::create(log).unwrap();
    let mut cmd = Command::new(bin());
    cmd.args(["run", &ws.dir.display().to_string(), "--listen", &addr])
        .args(extra)
        .stdout(f.try_clone().unwrap())
        .stderr(f);
    for (k, v) in env {
        cmd.env(k, v);
    }
    (cmd.spawn().unwrap(), addr)
}

/// Wait until `log` contains `needle`.
fn wait_for(log: &Path, needle: &str) -> String {
    let t = Instant::now();
    loop {
        let text = std::fs::read_to_string(log).unwrap_or_default();
        if text.contains(needle) {
            return text;
        }
        assert!(t.elapsed() < T, "no {needle:?} in:\n{text}");
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// Issue 15 item 5, logs: `--log-format text` writes readable lines, the default off a terminal is JSON
/// (what systemd's journal gets); the listen address is written plainly (no `Some(...)`); "batch settled"
/// carries the repair cost, the damage and the reason; an invalid `LABELWEIR_LOG` is refused. Planted
/// defects it catches: the old debug-form listen field, the old silent fallback on a bad filter.
#[test]
fn daemon_logs_are_readable_or_json_and_a_bad_log_filter_is_refused() {
    let ws = Ws::new(&["north-sort"]);
    let out = Command::new(bin())
        .args(["run", &ws.dir.display().to_string()])
        .env("LABELWEIR_LOG", "labelweir=notalevel")
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(78),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stderr).contains("LABELWEIR_LOG"));

    let log = ws.tmp.path().join("text.log");
    let (mut child, addr) = spawn_daemon(&ws, &["--log-format", "text"], &[], &log);
    let text = wait_for(&log, "ready");
    assert!(text.contains(&format!("listen={addr}")), "{text}");
    assert!(!text.contains("Some("), "{text}");
    assert!(
        !text.lines().any(|l| l.trim_start().starts_with('{')),
        "text, not JSON:\n{text}"
    );
    ws.deliver("north-sort", "week01.csv", &clean_batch("n1", 120, 3).csv());
    let text = wait_for(&log, "batch settled");
    let settled = text.lines().find(|l| l.contains("batch settled")).unwrap();
    for field in ["repair_cost=", "damage=", "reason=", "outcome="] {
        assert!(settled.contains(field), "{field} missing: {settled}");
    }
    signal(child.id(), "TERM");
    assert!(wait_with_timeout(&mut child, T).success());

    // Off a terminal (here a file; under systemd the journal) the default is JSON, one object a line.
    let log = ws.tmp.path().join("json.log");
    let (mut child, addr) = spawn_daemon(&ws, &[], &[], &log);
    let text = wait_for(&log, "\"ready\"");
    let ready: Value = text
        .lines()
        .filter_map(|l| serde_json::from_str::<Value>(l).ok())
        .find(|v| v["fields"]["message"] == "ready")
        .unwrap_or_else(|| panic!("no JSON ready line:\n{text}"));
    assert_eq!(ready["fields"]["listen"], addr.as_str(), "{ready}");
    signal(child.id(), "TERM");
    assert!(wait_with_timeout(&mut child, T).success());
}

/// Issue 15 item 5, the rest: `--json` on `init` and `config check`, errors as JSON under `--json`, an
/// actor recorded when `$USER` is empty, `config check` refusing a ceiling below its cold-start limit,
/// completions and man pages generated from the command-line definition.
#[test]
fn json_everywhere_it_is_asked_for_and_generated_completions_and_man_pages() {
    let tmp = tempfile::tempdir().unwrap();
    let trusted = tmp.path().join("trusted.csv");
    std::fs::write(&trusted, trusted_csv(10)).unwrap();
    let dir = tmp.path().join("ws");
    let dir_s = dir.display().to_string();
    // `init --json`, run with an empty $USER and no $LOGNAME: the actor is still somebody.
    let out = Command::new(bin())
        .args([
            "init",
            &dir_s,
            "--trusted",
            &trusted.display().to_string(),
            "--vendor",
            "north-sort",
            "--json",
        ])
        .env("USER", "")
        .env_remove("LOGNAME")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["trusted_items"], 80);
    assert_eq!(v["vendors"], serde_json::json!(["north-sort"]));
    let by = v["verified_by"].as_str().unwrap();
    assert!(!by.is_empty() && by != "unknown", "{by:?}");

    // `config check --json`: valid, then a ceiling below the cold-start limit.
    let v = ok_json(&["config", "check", &dir_s, "--json"]);
    assert_eq!(v["valid"], true, "{v}");
    let cfg = dir.join("labelweir.toml");
    let text = std::fs::read_to_string(&cfg).unwrap();
    assert!(text.contains("\nmax_repair_cost = 0.2"));
    std::fs::write(
        &cfg,
        text.replace("\nmax_repair_cost = 0.2", "\nmax_repair_cost = 0.01"),
    )
    .unwrap();
    let out = run_bin(&["config", "check", &dir_s, "--json"]);
    assert_eq!(out.status.code(), Some(78));
    let v: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["valid"], false);
    assert!(
        v["problems"][0]
            .as_str()
            .unwrap()
            .contains("cold_start_max_repair_cost"),
        "{v}"
    );
    let out = run_bin(&["config", "check", &dir_s]);
    assert_eq!(out.status.code(), Some(78));

    // `audit --since` takes a time without a zone (UTC, as listed); an unknown vendor is an error.
    let out = run_bin(&["audit", &dir_s, "--since", "2026-01-01T00:00:00"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let out = run_bin(&["audit", &dir_s, "--vendor", "nosuch"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("no vendor nosuch"));
    // A second demo run into the same folder says how to start over (exit 2, as the table says).
    let demo = tmp.path().join("demo");
    std::fs::create_dir_all(demo.join("workspace")).unwrap();
    std::fs::write(demo.join("workspace").join("labelweir.toml"), "").unwrap();
    std::fs::write(demo.join("trusted-items.csv"), "").unwrap();
    let out = run_bin(&["demo", &demo.display().to_string(), "--exit-when-idle"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("--fresh"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // An error under --json is one JSON object on stderr with the exit code.
    let out = run_bin(&[
        "quarantine",
        "show",
        &dir_s,
        "nosuch",
        "--no-html",
        "--json",
    ]);
    assert_eq!(out.status.code(), Some(2));
    let e: Value = serde_json::from_slice(&out.stderr)
        .unwrap_or_else(|e| panic!("not JSON ({e}): {}", String::from_utf8_lossy(&out.stderr)));
    assert_eq!(e["exit_code"], 2);
    assert!(e["error"].as_str().unwrap().contains("no batch"));

    // Completions and man pages come from the command-line definition: they know every subcommand.
    let out = run_bin(&["generate", "completions", "bash"]);
    assert!(out.status.success());
    let script = text_of(&out);
    for sub in [
        "quarantine",
        "release",
        "--dry-run",
        "--exclude-flagged",
        "--log-format",
    ] {
        assert!(script.contains(sub), "{sub} not in the bash completion");
    }
    let man = tmp.path().join("man");
    let out = run_bin(&["generate", "man", &man.display().to_string()]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let page = std::fs::read_to_string(man.join("labelweir-quarantine.1")).unwrap();
    assert!(page.starts_with(".ie") || page.contains(".TH"), "{page}");
    assert!(page.contains("quarantine"));
    assert!(man.join("labelweir.1").is_file());
}

fn text_of(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// Replace what differs between runs: the workspace path by `lw`, timestamps by `<time>`.
fn normalise(text: &str, ws: &Path) -> String {
    let time =
        regex::Regex::new(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}:\d{2}(\.\d+)?Z?( UTC)?").unwrap();
    let text = text.replace(&ws.display().to_string(), "lw");
    time.replace_all(&text, "<time>").into_owned()
}

/// The README's worked session, `(command, quoted output lines)`, from the console block after the marker
/// `<!-- worked session: checked by tests/it/ux.rs -->`.
fn readme_session() -> Vec<(String, Vec<String>)> {
    let readme =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md")).unwrap();
    let start = readme
        .find("<!-- worked session: checked by tests/it/ux.rs -->")
        .expect("the README marks its worked session");
    let block = readme[start..]
        .split("```console\n")
        .nth(1)
        .unwrap()
        .split("\n```")
        .next()
        .unwrap();
    let mut out: Vec<(String, Vec<String>)> = Vec::new();
    let mut continued = false;
    for line in block.lines() {
        if let Some(cmd) = line.strip_prefix("$ ") {
            out.push((cmd.trim_end_matches('\\').trim().to_string(), Vec::new()));
            continued = line.ends_with('\\');
        } else if continued {
            let last = out.last_mut().unwrap();
            last.0.push(' ');
            last.0.push_str(line.trim().trim_end_matches('\\').trim());
            continued = line.ends_with('\\');
        } else if let Some(last) = out.last_mut() {
            last.1.push(line.to_string());
        }
    }
    out
}

/// Split a README command line into words (single and double quotes group words).
fn words(cmd: &str) -> Vec<String> {
    let mut v = Vec::new();
    let mut cur = String::new();
    let mut quote: Option<char> = None;
    let mut any = false;
    for c in cmd.chars() {
        match (quote, c) {
            (Some(q), c) if c == q => quote = None,
            (Some(_), c) => cur.push(c),
            (None, '"' | '\'') => {
                quote = Some(c);
                any = true;
            }
            (None, ' ') => {
                if any || !cur.is_empty() {
                    v.push(std::mem::take(&mut cur));
                }
                any = false;
            }
            (None, c) => cur.push(c),
        }
    }
    if any || !cur.is_empty() {
        v.push(cur);
    }
    v
}

/// Issue 15 item 6: the README's worked session is a real run. The test builds the same workspace
/// ([`fixture_workspace`]), runs every `labelweir` command of the session (on `lw`, the workspace) and checks
/// that every output line the README quotes appears in the real output, after replacing timestamps and
/// the workspace path; lines of `...` stand for output left out. With `LABELWEIR_PRINT_SESSION=1` it
/// prints the real session instead, to paste into the README after a change of output.
#[test]
fn the_readme_worked_session_matches_a_real_run() {
    let (ws, _) = fixture_workspace();
    let session = readme_session();
    assert!(session.len() >= 5, "{session:?}");
    let print = std::env::var_os("LABELWEIR_PRINT_SESSION").is_some();
    let mut missing = Vec::new();
    for (cmd, quoted) in &session {
        let w = words(cmd);
        assert_eq!(
            w[0], "labelweir",
            "only labelweir commands in the session: {cmd}"
        );
        let args: Vec<String> = w[1..]
            .iter()
            .map(|a| {
                if a == "lw" {
                    ws.dir.display().to_string()
                } else if let Some(rest) = a.strip_prefix("lw/") {
                    ws.dir.join(rest).display().to_string()
                } else {
                    a.clone()
                }
            })
            .collect();
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let out = run_bin(&args);
        let real = normalise(
            &format!(
                "{}{}",
                String::from_utf8_lossy(&out.stdout),
                String::from_utf8_lossy(&out.stderr)
            ),
            &ws.dir,
        );
        if print {
            println!("$ {cmd}\n{real}");
            continue;
        }
        let lines: HashSet<&str> = real.lines().map(str::trim_end).collect();
        for q in quoted {
            let q = normalise(q, &ws.dir);
            let q = q.trim_end();
            if q.trim() == "..." || q.is_empty() {
                continue;
            }
            if !lines.contains(q) {
                missing.push(format!("{cmd}: {q:?}"));
            }
        }
    }
    assert!(
        missing.is_empty(),
        "README lines not in a real run (LABELWEIR_PRINT_SESSION=1 prints the real session):\n{}",
        missing.join("\n")
    );
}

/// The demo, as a new user first sees it: every delivery the demo's plan calls clean is accepted, the
/// systematically flipped ones are quarantined and the malformed one is rejected, each verdict printed once.
/// Before the demo started from the plant's own labelled history (an in-house pool), its pool was built
/// only from the vendors' admitted items; with their flagged items waiting for a reviewer the reference
/// model learned too little of the hard-but-right items, and this test failed at "east-labels/week03.csv:
/// clean, QUARANTINED" (label fit z ≈ −2.4 per clean batch, `labels_unlikely`).
#[test]
fn the_demo_accepts_every_clean_delivery_and_holds_the_flipped_ones() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("demo").display().to_string();
    let demo = |fresh: &[&str]| {
        let fast = [
            "--exit-when-idle",
            "--pace-ms",
            "50",
            "--listen",
            "127.0.0.1:0",
        ];
        run_bin(&[&["demo", dir.as_str()], fresh, &fast[..]].concat())
    };
    let out = demo(&[]);
    let shown = text(&out);
    assert!(out.status.success(), "{shown}");
    // The plan: `dropped VENDOR/FILE (NOTE)`.
    let mut planned: HashMap<String, String> = HashMap::new();
    for line in shown.lines() {
        if let Some(rest) = line.trim().strip_prefix("dropped ") {
            let (what, note) = rest.split_once(" (").expect("dropped V/F (note)");
            planned.insert(what.to_string(), note.trim_end_matches(')').to_string());
        }
    }
    assert_eq!(planned.len(), 13, "{shown}");
    // The verdicts: `VENDOR FILE -> OUTCOME ...`.
    let mut verdicts: HashMap<String, String> = HashMap::new();
    for line in shown.lines() {
        let cols: Vec<&str> = line.split_whitespace().collect();
        if cols.len() >= 4 && cols[2] == "->" {
            let key = format!("{}/{}", cols[0], cols[1]);
            assert!(
                verdicts.insert(key.clone(), cols[3].to_string()).is_none(),
                "{key} decided twice: {shown}"
            );
        }
    }
    for (what, note) in &planned {
        let expected = if note == "clean" {
            "ACCEPTED"
        } else if note.starts_with("systematically flipped") {
            "QUARANTINED"
        } else if note.starts_with("malformed") {
            "REJECTED"
        } else {
            panic!("a note the test does not know: {note}")
        };
        let got = verdicts.get(what).map_or("none", String::as_str);
        assert_eq!(got, expected, "{what}: {note}, {got}\n{shown}");
    }
    assert!(shown.contains("not proof"), "{shown}");
    // `--fresh` starts the same folder over (its pool file included) with the same verdicts.
    let again = demo(&["--fresh"]);
    assert!(again.status.success(), "{}", text(&again));
    let count = |o: &str, what: &str| o.lines().filter(|l| l.contains(what)).count();
    for outcome in ["ACCEPTED", "QUARANTINED", "REJECTED"] {
        assert_eq!(
            count(&text(&again), outcome),
            count(&shown, outcome),
            "{outcome}"
        );
    }
}
