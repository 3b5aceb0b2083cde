//! Unit tests of the store: transitions, pending notices, ids, the lock.
use super::*;

fn tmp_store() -> (tempfile::TempDir, Store) {
    let d = tempfile::tempdir().unwrap();
    let s = Store::open(&d.path().join("state"), &StoreSettings::default()).unwrap();
    (d, s)
}

fn claimed(s: &Store) -> BatchRecord {
    let id = s.new_batch_id().unwrap();
    let r = BatchRecord::claimed(id.clone(), "v1", "x.csv".into(), format!("{id}.csv"));
    s.record_claim(&r).unwrap();
    r
}

#[test]
fn verdict_then_second_transition_conflicts() {
    let (_d, s) = tmp_store();
    let mut r = claimed(&s);
    r.sha256 = Some("ab".into());
    r.outcome = Some(Outcome::Quarantined);
    let r = s
        .record_verdict(
            &r,
            AuditRecord::new("daemon", "verdict"),
            true,
            None,
            None,
            None,
        )
        .unwrap();
    assert_eq!(r.state, BatchState::Decided);
    assert_eq!(
        s.batch_by_hash("v1", "ab").unwrap().as_deref(),
        Some(r.id.as_str())
    );
    // Recording a second verdict on a decided batch is refused.
    assert!(matches!(
        s.record_verdict(
            &r,
            AuditRecord::new("daemon", "verdict"),
            true,
            None,
            None,
            None
        ),
        Err(StoreError::Conflict { .. })
    ));
    s.transition(
        &r.id,
        &[BatchState::Decided],
        BatchState::Quarantined,
        PoolChange::None,
        vec![],
        |_| {},
    )
    .unwrap();
    let entry = PoolEntry {
        batch_id: r.id.clone(),
        vendor: "v1".into(),
        ids: vec!["a".into(), "b".into()],
        labels: vec![0, 1],
        x: vec![1.0, 2.0, 3.0, 4.0],
        n_features: 2,
    };
    let rel = s
        .transition(
            &r.id,
            &[BatchState::Quarantined],
            BatchState::Released,
            PoolChange::Add(entry.clone()),
            vec![AuditRecord::new("alice", "release")],
            |_| {},
        )
        .unwrap();
    assert!(rel.pool_seq.is_some());
    // A second reviewer's release is refused cleanly.
    let again = s.transition(
        &r.id,
        &[BatchState::Quarantined],
        BatchState::Released,
        PoolChange::Add(entry.clone()),
        vec![],
        |_| {},
    );
    assert!(matches!(again, Err(StoreError::Conflict { .. })));
    let (x, y, last) = s.pool_matrix(2).unwrap();
    assert_eq!((x.nrows(), y, last), (2, vec![0, 1], rel.pool_seq.unwrap()));
    assert_eq!(s.pool_entries_after(0).unwrap()[0].1, entry);
    assert_eq!(s.pool_epoch().unwrap(), 0);
    s.transition(
        &r.id,
        &[BatchState::Released],
        BatchState::Withdrawn,
        PoolChange::Remove,
        vec![],
        |_| {},
    )
    .unwrap();
    assert_eq!(s.pool_items().unwrap(), 0);
    assert_eq!(s.pool_epoch().unwrap(), 1);
    let audit = s.audit_since(0).unwrap();
    assert_eq!(
        audit.iter().map(|a| a.action.as_str()).collect::<Vec<_>>(),
        ["verdict", "release"]
    );
    assert!(audit[0].seq < audit[1].seq);
}

#[test]
fn pending_notices_are_recorded_as_sent_once() {
    use crate::notice::{BatchRef, DecidedBy, Notice, NoticeVerdict};
    let (_d, s) = tmp_store();
    let r = claimed(&s);
    let notice = |v| {
        Notice::new(
            v,
            DecidedBy::Reviewer,
            BatchRef {
                batch_id: r.id.clone(),
                vendor: r.vendor.clone(),
                file_name: None,
                sha256: None,
                received_at: r.claimed_at,
                decided_at: r.claimed_at,
            },
        )
    };
    let (a, b) = (
        notice(NoticeVerdict::Released),
        notice(NoticeVerdict::Withdrawn),
    );
    let pending = vec![a.clone(), b.clone()];
    s.transition(
        &r.id,
        &[BatchState::Claimed],
        BatchState::Claimed,
        PoolChange::None,
        vec![],
        |rec| rec.pending_notices = pending.clone(),
    )
    .unwrap();
    let audits = || s.audit_since(0).unwrap().len();
    let before = audits();
    let files = vec!["x.released.json".to_string()];
    let sent = |n: &[Notice]| {
        s.notices_sent(&r.id, n, &files, vec![AuditRecord::new("t", "notice")])
            .unwrap()
    };
    assert!(sent(std::slice::from_ref(&a)));
    let rec = s.batch(&r.id).unwrap().unwrap();
    // (Timestamps are stored to the millisecond: compare by file stem.)
    let stems: Vec<String> = rec.pending_notices.iter().map(Notice::file_stem).collect();
    assert_eq!(stems, vec![b.file_stem()]);
    assert_eq!(rec.notices, files);
    assert_eq!(audits(), before + 1);
    // A second sender of the same notice finds it gone: nothing is written.
    assert!(!sent(std::slice::from_ref(&a)));
    assert!(!sent(&[a, b.clone()]));
    assert_eq!(audits(), before + 1);
    assert!(sent(&[b]));
    assert!(s.batch(&r.id).unwrap().unwrap().pending_notices.is_empty());
    assert_eq!(audits(), before + 2);
}

#[test]
fn ids_are_unique_across_reopen() {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("state");
    let a = {
        let s = Store::open(&p, &StoreSettings::default()).unwrap();
        let r = claimed(&s);
        r.id
    };
    let s = Store::open(&p, &StoreSettings::default()).unwrap();
    let b = claimed(&s);
    assert!(b.id > a, "{} vs {a}", b.id);
    assert!(s.batch(&a).unwrap().is_some());
}

#[test]
fn second_open_is_refused_as_locked() {
    let (d, _s) = tmp_store();
    let e = Store::open(&d.path().join("state"), &StoreSettings::default()).unwrap_err();
    assert!(matches!(e, StoreError::Locked(_)), "{e}");
}

/// A release that writes the vendor's history does so in the transition's own transaction: the history
/// changes with the state, on the history as stored; a refused transition changes neither.
#[test]
fn a_transition_with_history_updates_both_or_neither() {
    let (_d, s) = tmp_store();
    let mut r = claimed(&s);
    r.outcome = Some(Outcome::Quarantined);
    let r = s
        .record_verdict(
            &r,
            AuditRecord::new("daemon", "verdict"),
            true,
            None,
            None,
            None,
        )
        .unwrap();
    s.transition(
        &r.id,
        &[BatchState::Decided],
        BatchState::Quarantined,
        PoolChange::None,
        vec![],
        |_| {},
    )
    .unwrap();
    let before = VendorHistory {
        accepted_total: 4,
        ..VendorHistory::default()
    };
    s.set_vendor_history("v1", &before, AuditRecord::new("test", "seed"))
        .unwrap();
    let bump = |h: &mut VendorHistory| h.accepted_total += 1;
    // Refused (the batch is not Released): nothing changes.
    let refused = s.transition_with_history(
        &r.id,
        &[BatchState::Released],
        BatchState::Withdrawn,
        PoolChange::None,
        vec![],
        |_| {},
        bump,
    );
    assert!(matches!(refused, Err(StoreError::Conflict { .. })));
    assert_eq!(s.vendor_history("v1").unwrap().accepted_total, 4);
    let done = s
        .transition_with_history(
            &r.id,
            &[BatchState::Quarantined],
            BatchState::Released,
            PoolChange::None,
            vec![AuditRecord::new("rev", "release")],
            |_| {},
            bump,
        )
        .unwrap();
    assert_eq!(done.state, BatchState::Released);
    assert_eq!(s.vendor_history("v1").unwrap().accepted_total, 5);
    // Another vendor's history is untouched.
    assert_eq!(s.vendor_history("v2").unwrap().accepted_total, 0);
}

/// The scoring worker writes the vendor's history with a verdict from the copy it read before scoring;
/// a spot-check answer recorded meanwhile must survive it (the worker's copy of the spot-check state
/// is stale by design). Fails with the verdict writing its copy whole.
#[test]
fn a_verdict_keeps_the_stored_spot_check_state() {
    use crate::policy::spot::{SpotHold, Stratum};
    let (_d, s) = tmp_store();
    let stale = VendorHistory::default();
    let mut answered = VendorHistory::default();
    answered.spot.hard.s = 6.0;
    answered.spot.hard.run = vec!["b1".into()];
    answered.spot_hold = Some(SpotHold {
        batch: "b1".into(),
        stratum: Stratum::Hard,
        statistic: 6.0,
        checked: 8,
        disagreed: 8,
    });
    s.set_vendor_history(
        "v1",
        &answered,
        AuditRecord::new("expert", "spot_check_answer"),
    )
    .unwrap();
    let mut worker = stale.clone();
    worker.accepted_total = 1;
    let mut r = claimed(&s);
    r.outcome = Some(Outcome::Accepted);
    s.record_verdict(
        &r,
        AuditRecord::new("daemon", "verdict"),
        false,
        Some(&worker),
        None,
        None,
    )
    .unwrap();
    let h = s.vendor_history("v1").unwrap();
    assert_eq!(h.accepted_total, 1, "the worker's part is written");
    assert_eq!(
        (h.spot.clone(), h.spot_hold.clone()),
        (answered.spot, answered.spot_hold)
    );
}

/// A change that must happen once is refused inside the transaction when the record as stored says so:
/// two answers to one spot check that each read the batch before the other wrote (the race the review
/// path's early check cannot see) update the vendor's history once. The second call stands for the
/// racing request: it passes its own stale copy's check and reaches the store. Fails with the guard
/// left out of the transaction (`refuse` ignored): the history is bumped twice and the second answer
/// overwrites the first.
#[test]
fn a_refused_change_writes_nothing_and_says_why() {
    use crate::store::{SpotAnswers, SpotCheck};
    let (_d, s) = tmp_store();
    let mut r = claimed(&s);
    r.outcome = Some(Outcome::Accepted);
    r.spot_check = Some(SpotCheck {
        items: Vec::new(),
        answered: None,
    });
    let r = s
        .record_verdict(
            &r,
            AuditRecord::new("daemon", "verdict"),
            true,
            None,
            None,
            None,
        )
        .unwrap();
    let answer = |by: &'static str| {
        s.transition_with_history_unless(
            &r.id,
            &[r.state],
            r.state,
            PoolChange::None,
            vec![AuditRecord::new(by, "spot_check_answer")],
            |rec| {
                rec.spot_check
                    .as_ref()?
                    .answered
                    .as_ref()
                    .map(|a| format!("answered by {}", a.by))
            },
            |rec| {
                if let Some(c) = rec.spot_check.as_mut() {
                    c.answered = Some(SpotAnswers {
                        by: by.into(),
                        at: Utc::now(),
                        labels: Vec::new(),
                        disagreed: 0,
                        signal: None,
                    });
                }
            },
            |h| h.accepted_total += 1,
        )
    };
    answer("first").unwrap();
    match answer("second") {
        Err(StoreError::Refused { why, .. }) => assert_eq!(why, "answered by first"),
        other => panic!("the second answer went through: {other:?}"),
    }
    assert_eq!(s.vendor_history("v1").unwrap().accepted_total, 1);
    let stored = s.batch(&r.id).unwrap().unwrap();
    assert_eq!(
        stored.spot_check.unwrap().answered.unwrap().by,
        "first",
        "the first answer stands"
    );
    let audit = s.audit_since(0).unwrap();
    assert_eq!(
        audit
            .iter()
            .filter(|a| a.action == "spot_check_answer")
            .count(),
        1,
        "the refused answer left no audit record"
    );
}

/// Every stored vendor history is listed, in vendor order, whether or not the configuration still names
/// the vendor (the store knows nothing of the configuration): what the daemon's startup reads to finish
/// a spot-check recall pending for a vendor taken out of it. Fails if the listing read only given names
/// or lost a history's contents.
#[test]
fn every_stored_vendor_history_is_listed_with_its_contents() {
    let (_d, s) = tmp_store();
    assert!(s.vendor_histories().unwrap().is_empty());
    let pending = VendorHistory {
        spot_recall: Some(crate::policy::spot::PendingRecall {
            cause: "b-7".into(),
            batches: vec!["b-3".into(), "b-5".into()],
        }),
        ..VendorHistory::default()
    };
    s.set_vendor_history("zeta", &pending, AuditRecord::new("test", "seed"))
        .unwrap();
    s.set_vendor_history(
        "alpha",
        &VendorHistory::default(),
        AuditRecord::new("test", "seed"),
    )
    .unwrap();
    let listed = s.vendor_histories().unwrap();
    let names: Vec<&str> = listed.iter().map(|(v, _)| v.as_str()).collect();
    assert_eq!(names, ["alpha", "zeta"]);
    assert_eq!(listed[1].1, pending);
    assert_eq!(listed[0].1.spot_recall, None);
}
