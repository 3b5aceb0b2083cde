//! A real crash test (in the spirit of sled's own `test_crash_recovery`): the whole daemon is killed with
//! SIGKILL at random moments while batches stream in, restarted, and after the last round the workspace
//! must satisfy: no file lost, none processed twice, every verdict in the audit trail matches the folder
//! its file is in, and the pool holds exactly the accepted batches.

use std::collections::{HashMap, HashSet};
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};

use crate::util::*;
use labelweir::store::BatchState;

#[test]
fn sigkill_at_random_moments_loses_nothing_and_repeats_nothing() {
    let ws = Ws::with(
        &["v1", "v2"],
        &[("quiet_period_ms = 150", "quiet_period_ms = 0")],
    );
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(0xC0FFEE);
    let rounds = 24;
    let mut dropped: Vec<(String, String)> = Vec::new(); // (vendor, name)
    let started = Instant::now();
    let mut kills_mid_batch = 0;
    // Claimed, not yet filed batches (generated names in processing/).
    let processing = || -> HashSet<String> {
        std::fs::read_dir(ws.path("processing"))
            .unwrap()
            .flatten()
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|n| !n.starts_with('.'))
            .collect()
    };
    for round in 0..rounds {
        // Files arrive before and while the daemon runs; some are poisoned, some malformed, some repeated.
        let in_processing_before = processing();
        let d = Daemon::spawn(&ws.dir, &ws.tmp.path().join(format!("crash-{round}.log")));
        let deadline = Instant::now() + Duration::from_millis(rng.random_range(150..1500));
        let mut k = 0;
        while Instant::now() < deadline {
            let vendor = if rng.random_bool(0.5) { "v1" } else { "v2" };
            let name = format!("r{round:02}-{k}.csv");
            let seed = 1000 + (round * 100 + k) as u64;
            let bytes = match rng.random_range(0..10) {
                0 => b"id,label\nbroken".to_vec(),
                1 => region_flipped_batch(&name, 60, seed, 0.3).csv(),
                _ => clean_batch(&name, 60, seed).csv(),
            };
            ws.deliver(vendor, &name, &bytes);
            dropped.push((vendor.to_string(), name));
            k += 1;
            std::thread::sleep(Duration::from_millis(rng.random_range(10..120)));
        }
        // Every other round waits until a batch of this round is claimed (polling processing/) and kills
        // then, so that the recovery paths run whatever the machine's load; the other rounds kill blind.
        if round % 2 == 1 {
            let watch = Instant::now();
            while watch.elapsed() < Duration::from_secs(20)
                && processing().difference(&in_processing_before).count() == 0
            {
                std::thread::sleep(Duration::from_millis(1));
            }
        }
        d.kill();
        // Work in flight at the kill: a file this round claimed into processing/ and had not filed.
        let in_flight = processing().difference(&in_processing_before).count() > 0;
        kills_mid_batch += usize::from(in_flight);
        assert!(
            started.elapsed() < Duration::from_secs(600),
            "crash test ran too long"
        );
    }
    // Final run: let everything settle, then stop cleanly.
    let d = Daemon::start(&ws);
    ws.wait_settled(dropped.len(), Duration::from_secs(300));
    assert!(d.stop().success());

    let store = ws.store();
    let recs = store.batches().unwrap();
    // No file lost, none processed twice: exactly one record per dropped file, all settled.
    let mut by_name: HashMap<(String, String), Vec<_>> = HashMap::new();
    for r in &recs {
        by_name
            .entry((r.vendor.clone(), r.original_name.clone()))
            .or_default()
            .push(r);
    }
    for key in &dropped {
        let v = by_name.get(key).unwrap_or_else(|| panic!("lost {key:?}"));
        assert_eq!(v.len(), 1, "{key:?} processed {} times", v.len());
        assert!(v[0].state.is_settled(), "{key:?} left {:?}", v[0].state);
    }
    assert_eq!(recs.len(), dropped.len());
    for v in ["v1", "v2"] {
        assert!(std::fs::read_dir(ws.path("inbox").join(v))
            .unwrap()
            .flatten()
            .all(|e| e.file_name().to_string_lossy().starts_with('.')));
    }
    assert!(std::fs::read_dir(ws.path("processing"))
        .unwrap()
        .flatten()
        .all(|e| e.file_name().to_string_lossy().starts_with('.')));
    // No temporary file of an interrupted write survives the restart.
    for dir in [
        "accepted",
        "quarantine",
        "rejected",
        "notices/v1",
        "notices/v2",
    ] {
        let left: Vec<String> = std::fs::read_dir(ws.path(dir))
            .unwrap()
            .flatten()
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|n| n.starts_with('.') && n.contains(".tmp-"))
            .collect();
        assert!(left.is_empty(), "{dir}/ keeps {left:?}");
    }
    // Every verdict in the audit trail: exactly one per batch, and its file is in the matching folder.
    let audit = store.audit_since(0).unwrap();
    let mut verdicts: HashMap<String, String> = HashMap::new();
    for a in audit.iter().filter(|a| a.action == "verdict") {
        let id = a.batch_id.clone().unwrap();
        assert!(
            verdicts
                .insert(id.clone(), a.outcome.clone().unwrap())
                .is_none(),
            "two verdicts for {id}"
        );
    }
    assert_eq!(verdicts.len(), recs.len());
    let mut files_seen = 0;
    let mut recalled = 0;
    for r in &recs {
        let outcome = &verdicts[&r.id];
        let folder = match outcome.as_str() {
            // An accepted batch a later hold recalled (`recalled_on_drift`) is in quarantine, out of the
            // pool; nothing else moves a batch in this test (no reviewer).
            "accepted" if r.recalled.is_some() => "quarantine",
            "accepted" => "accepted",
            "quarantined" => "quarantine",
            "rejected" | "duplicate" => "rejected",
            other => panic!("unknown outcome {other}"),
        };
        assert_eq!(r.outcome.map(|o| o.as_str()), Some(outcome.as_str()));
        if r.recalled.is_some() {
            assert_eq!(r.state, BatchState::Quarantined, "{}", r.id);
            assert!(r.pool_seq.is_none(), "{} recalled but in the pool", r.id);
            recalled += 1;
        }
        assert!(
            ws.path(folder).join(&r.file_name).exists(),
            "{} ({outcome}) not in {folder}/",
            r.id
        );
        for other in ["accepted", "quarantine", "rejected"]
            .iter()
            .filter(|f| **f != folder)
        {
            assert!(
                !ws.path(other).join(&r.file_name).exists(),
                "{} also in {other}/",
                r.id
            );
        }
        files_seen += 1;
    }
    assert_eq!(
        files_seen,
        ws.settled(),
        "no stray files in the terminal folders"
    );
    // The pool holds exactly the accepted batches, each once, without their held or dropped items.
    let in_pool = |r: &labelweir::store::BatchRecord| {
        let out = r
            .held
            .iter()
            .filter(|h| h.state != labelweir::store::HeldState::AdmittedProposed)
            .count();
        (r.items.unwrap() - out) as u64
    };
    let mut pool = store.pool_batches().unwrap();
    let mut accepted: Vec<String> = recs
        .iter()
        .filter(|r| r.state == BatchState::Accepted && in_pool(r) > 0)
        .map(|r| r.id.clone())
        .collect();
    pool.sort();
    accepted.sort();
    assert_eq!(pool, accepted);
    let pool_items: u64 = recs
        .iter()
        .filter(|r| r.state == BatchState::Accepted)
        .map(in_pool)
        .sum();
    assert_eq!(store.pool_items().unwrap(), pool_items);
    // The invariants above are only worth something if kills hit batches between claim and filing (the
    // recovery paths); a test whose kills all land while the daemon is idle checks nothing. Shown to fail
    // by a planted defect in this test (waiting for every delivered file to settle before each kill: 0 of
    // 24 kills mid-batch).
    println!(
        "{kills_mid_batch} of {rounds} kills left a batch between claim and filing; {recalled} batches recalled"
    );
    assert!(
        kills_mid_batch >= rounds / 4,
        "only {kills_mid_batch} of {rounds} kills hit a batch in flight"
    );
}
