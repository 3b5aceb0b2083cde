//! Recall through the daemon: a vendor's drip gets its first files accepted while a stream rule's CUSUM
//! climbs; when a later file crosses the decision interval, the batches accepted since the statistic last
//! stood at 0 go back to quarantine, out of the pool, with a notice that names no item, and a reviewer can
//! release one without counting it twice in the vendor's record.

use std::collections::HashMap;
use std::time::{Duration, Instant};

use serde_json::Value;

use crate::review::{metric, ok_json};
use crate::util::*;

const T: Duration = Duration::from_secs(120);

/// Batch id → (outcome, reason) of every `recall` record in the audit trail.
/// A file's permission bits (panics when it is missing).
fn mode(path: &std::path::Path) -> u32 {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(path)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()))
        .permissions()
        .mode()
        & 0o7777
}

fn recalls(dir: &str) -> HashMap<String, (String, String)> {
    let out = run_bin(&["audit", dir, "--json"]);
    let mut m = HashMap::new();
    for line in String::from_utf8_lossy(&out.stdout).lines() {
        let Ok(v) = serde_json::from_str::<Value>(line) else {
            continue;
        };
        if v["action"] == "recall" {
            m.insert(
                v["batch_id"].as_str().unwrap_or_default().to_string(),
                (
                    v["outcome"].as_str().unwrap_or_default().to_string(),
                    v["reason"].as_str().unwrap_or_default().to_string(),
                ),
            );
        }
    }
    m
}

/// The batch rules are blunted and the label-fit CUSUM's interval widened (test settings: on the plant
/// a 300-item file with 3 % flipped labels steps that statistic by about 47, past the default `h` = 40
/// on its own, and a batch that crosses `h` by itself recalls nothing), so that the drip's first files
/// are accepted while the statistic climbs and a later file's hold needs them. The drip's 300-item files
/// carry 1 %, 2 %, 3 %, … uniform flips; it is delivered file by file until one is held (at most 8).
#[test]
fn a_stream_hold_recalls_the_batches_accepted_since_its_statistic_was_last_zero() {
    let ws = Ws::with(
        &["drip-co"],
        &[
            ("fit_cusum_h = 40.0", "fit_cusum_h = 100.0"),
            ("item_alpha = 1e-4", "item_alpha = 1e-300"),
            ("label_alpha = 1e-4", "label_alpha = 1e-300"),
            (
                "cold_start_max_repair_cost = 0.05",
                "cold_start_max_repair_cost = 1.0",
            ),
            (
                "cold_start_max_damage_nats = 0.05",
                "cold_start_max_damage_nats = 100.0",
            ),
            ("max_repair_cost = 0.2", "max_repair_cost = 1.0"),
            ("max_damage_nats = 0.25", "max_damage_nats = 100.0"),
            (
                "cold_start_damage_excess_z = 3.0",
                "cold_start_damage_excess_z = 1000.0",
            ),
        ],
    );
    let dir = ws.dir.display().to_string();
    let d = Daemon::start(&ws);
    ws.deliver("drip-co", "w00.csv", &clean_batch("w00", 300, 40).csv());
    ws.wait_filed(1, T);
    let mut held: Option<Value> = None;
    for w in 1..=8u64 {
        let b = uniform_flipped_batch(&format!("w{w:02}"), 300, 40 + w, 0.01 * w as f64);
        ws.deliver("drip-co", &format!("w{w:02}.csv"), &b.csv());
        ws.wait_filed(1 + w as usize, T);
        // The file just delivered (recalled files join the list too, and they are older).
        let q = ok_json(&["quarantine", "list", &dir, "--json"]);
        let name = format!("w{w:02}.csv");
        if let Some(e) = q
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["original_name"] == name.as_str())
        {
            let id = e["batch_id"].as_str().unwrap().to_string();
            held = Some(ok_json(&["quarantine", "show", &dir, &id, "--json"]));
            break;
        }
    }
    let held = held.expect("the drip is held within 8 files");
    let decision = &held["batch"]["decision"];
    let codes: Vec<&str> = decision["reasons"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["code"].as_str().unwrap())
        .collect();
    let run = |rule: &str, field: &str| {
        if codes.contains(&rule) {
            decision["items"][field].as_u64().unwrap()
        } else {
            0
        }
    };
    let stream = run("flagged_items_drift", "cusum_run").max(run("labels_unlikely", "fit_run"));
    let reach = decision["recall"].as_u64().unwrap();
    assert!(
        reach >= 1,
        "a stream rule climbed over accepted files first: {codes:?} {decision}"
    );
    assert_eq!(reach, stream, "the run of the stream rule that fired");
    let held_id = held["batch"]["id"].as_str().unwrap().to_string();

    // The `reach` newest accepted files (before the held one) are quarantined again, as recalled; the
    // ones before them stay accepted.
    let t = Instant::now();
    let recalled: Vec<Value> = loop {
        let q = ok_json(&["quarantine", "list", &dir, "--json"]);
        let r: Vec<Value> = q
            .as_array()
            .unwrap()
            .iter()
            .filter(|e| e["recalled_by"] == held_id.as_str())
            .cloned()
            .collect();
        if r.len() as u64 >= reach || t.elapsed() > T {
            break r;
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    assert_eq!(recalled.len() as u64, reach, "{recalled:?}");
    let audit = recalls(&dir);
    assert_eq!(audit.len() as u64, reach, "{audit:?}");
    let mut names: Vec<String> = recalled
        .iter()
        .map(|e| e["original_name"].as_str().unwrap().to_string())
        .collect();
    names.sort();
    let held_name = held["batch"]["original_name"].as_str().unwrap();
    let held_week: u64 = held_name[1..3].parse().unwrap();
    let want: Vec<String> = (held_week - reach..held_week)
        .map(|w| format!("w{w:02}.csv"))
        .collect();
    assert_eq!(names, want, "the newest accepted files are recalled");
    for e in &recalled {
        assert_eq!(e["reasons"][0], "recalled_on_drift");
        let id = e["batch_id"].as_str().unwrap();
        let (outcome, reason) = &audit[id];
        assert_eq!(outcome, "quarantined");
        assert!(
            reason.contains(&held_id),
            "the audit names the held batch: {reason}"
        );
        let show = ok_json(&["quarantine", "show", &dir, id, "--json"]);
        assert_eq!(show["batch"]["recalled"]["held_batch"], held_id.as_str());
        assert!(
            show["batch"]["pool_seq"].is_null(),
            "out of the pool: {show}"
        );
        let file = show["batch"]["file_name"].as_str().unwrap();
        // Read-only in quarantine/, as a batch held on arrival is (it was 0640 in accepted/).
        assert_eq!(mode(&ws.path("quarantine").join(file)), 0o440, "{file}");
    }
    // Nothing older than the run was recalled (the names above are exactly the run's files), and no
    // recalled file is left in accepted/.
    let accepted = ws.files_in("accepted");
    for e in &recalled {
        let id = e["batch_id"].as_str().unwrap();
        assert!(!accepted.iter().any(|f| f.starts_with(id)), "{accepted:?}");
    }
    // The scoring worker's pool (what the next batch is judged against, and the pool-size metric) drops
    // the recalled items too: it ends at the admitted items of the batches still accepted.
    let in_pool: u64 = accepted
        .iter()
        .map(|f| {
            let id = f.split('.').next().unwrap();
            let b = &ok_json(&["quarantine", "show", &dir, id, "--json"])["batch"];
            b["items"].as_u64().unwrap() - b["held"].as_array().map_or(0, Vec::len) as u64
        })
        .sum();
    let t = Instant::now();
    while metric(d.addr, "labelweir_pool_items") != Some(in_pool as f64) {
        assert!(
            t.elapsed() < T,
            "pool items {:?}, {in_pool} admitted in accepted batches",
            metric(d.addr, "labelweir_pool_items")
        );
        std::thread::sleep(Duration::from_millis(100));
    }

    // The recall notices name no item and validate against the schema.
    let notices = ws.path("notices").join("drip-co");
    let t = Instant::now();
    let recall_notices = loop {
        let n: Vec<_> = std::fs::read_dir(&notices)
            .unwrap()
            .map(|e| e.unwrap().path())
            .filter(|p| p.to_string_lossy().ends_with(".recalled.json"))
            .collect();
        if n.len() as u64 >= reach || t.elapsed() > T {
            break n;
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    assert_eq!(recall_notices.len() as u64, reach);
    for p in &recall_notices {
        let v: Value = serde_json::from_slice(&std::fs::read(p).unwrap()).unwrap();
        assert_eq!(v["verdict"], "recalled");
        assert!(v["items"].as_array().is_none_or(|a| a.is_empty()), "{v}");
        assert!(v["reasons"][0]["code"] == "recalled_on_drift", "{v}");
    }
    crate::review::validate_notices(&notices);
    assert_eq!(
        metric(
            d.addr,
            "labelweir_batches_recalled_total{vendor=\"drip-co\"}"
        ),
        Some(reach as f64)
    );

    // A reviewer releases one recalled file: back into the pool, and the vendor's record does not count
    // it a second time.
    let before = ok_json(&["quarantine", "show", &dir, &held_id, "--json"]);
    let accepted_before = before["vendor"]["accepted_total"].as_u64().unwrap();
    let one = recalled[0]["batch_id"].as_str().unwrap();
    let shown = ok_json(&["quarantine", "show", &dir, one, "--json"]);
    let kept_back = shown["batch"]["held"].as_array().map_or(0, Vec::len);
    assert!(
        kept_back > 0,
        "its flagged items were held back at acceptance: {shown}"
    );
    let r = ok_json(&[
        "quarantine",
        "release",
        &dir,
        one,
        "--by",
        "dana",
        "--reason",
        "checked by hand",
        "--json",
    ]);
    assert_eq!(r["state"], "released");
    let file = shown["batch"]["file_name"].as_str().unwrap();
    assert_eq!(mode(&ws.path("accepted").join(file)), 0o640, "{file}");
    // The release decided every item: none of its earlier held-back items waits for `quarantine admit`
    // (which would add it to the pool a second time).
    let waiting = ok_json(&["quarantine", "held", &dir, "--json"]);
    assert!(
        !waiting
            .as_array()
            .unwrap()
            .iter()
            .any(|e| e["batch_id"] == one),
        "{waiting}"
    );
    let after = ok_json(&["quarantine", "show", &dir, &held_id, "--json"]);
    assert_eq!(
        after["vendor"]["accepted_total"].as_u64().unwrap(),
        accepted_before,
        "a recalled batch was counted when it was accepted"
    );
}
