//! Unit tests of the scoring worker: the speculative absorb against the stored pool, and the labels
//! model of the items kept out of the pool.
use super::*;
use crate::data::{Classes, Format, TableOptions};
use crate::scenario::{self, Plant};
use crate::store::{BatchState, Outcome, PoolChange, PoolEntry};

/// A workspace of the recycling plant with one vendor, and a worker on it (no threads started).
fn worker(dir: &std::path::Path) -> (Worker, Plant) {
    let plant = Plant::new(11);
    let (tx, ty) = plant.sample_per_class(10, 12);
    let mut csv = Vec::new();
    crate::data::write_csv(
        &mut csv,
        ("id", "label"),
        &scenario::item_ids("t", ty.len()),
        &scenario::label_names(&ty),
        &scenario::feature_names(),
        tx.view(),
    )
    .unwrap();
    let trusted = dir.join("trusted.csv");
    std::fs::write(&trusted, csv).unwrap();
    let root = dir.join("ws");
    crate::workspace::create_workspace(&root, &trusted, &["v".to_string()], "test").unwrap();
    let ws = Workspace::new(&root);
    let config = Config::from_workspace(&root).unwrap();
    crate::workspace::prepare_folders(&ws, &config).unwrap();
    let store = Store::open_workspace(&root, &config.store).unwrap();
    let meta = store.workspace_meta().unwrap();
    let pool = load_pool(&store, &meta, &config).unwrap();
    let trusted = TrustedArrays::load(&store, &meta).unwrap();
    let metrics = crate::metrics::install(&config.vendors);
    let w = Worker {
        ws,
        config: Arc::new(config),
        store,
        meta,
        metrics,
        observer: None,
        trusted,
        pool,
        shared: Arc::default(),
        reread: None,
    };
    (w, plant)
}

/// Claim a clean batch of the plant and hand it to the worker as the ingest thread would.
fn submit(w: &mut Worker, plant: &Plant, i: u64, filer: &SyncSender<Filing>) {
    let (x, y) = plant.sample(150, 100 + i);
    let mut bytes = Vec::new();
    crate::data::write_csv(
        &mut bytes,
        ("id", "label"),
        &scenario::item_ids(&format!("b{i}-"), y.len()),
        &scenario::label_names(&y),
        &scenario::feature_names(),
        x.view(),
    )
    .unwrap();
    let table = crate::data::parse_table(
        &bytes,
        Format::Csv,
        "b.csv",
        &TableOptions::default(),
        Some(&w.meta.features),
    )
    .unwrap();
    let labels = table
        .class_indices(&Classes::from_labels(&w.meta.classes))
        .unwrap();
    let id = w.store.new_batch_id().unwrap();
    let record = BatchRecord::claimed(id.clone(), "v", format!("b{i}.csv"), format!("{id}.csv"));
    w.store.record_claim(&record).unwrap();
    let input = JobInput::Parsed {
        bytes,
        sha256: format!("{i:064x}"),
        table,
        labels,
    };
    w.process(
        Job {
            record,
            input,
            stamp: None,
        },
        filer,
    )
    .unwrap();
}

/// The store path: an empty summary that absorbs every stored pool entry in sequence order.
fn from_store(w: &Worker) -> PoolState {
    let mut fresh = PoolState {
        summary: PoolSummary::empty(w.meta.feature_map.clone(), w.meta.classes.len()),
        through_seq: 0,
        epoch: w.store.pool_epoch().unwrap(),
        dirty: false,
    };
    catch_up(&mut fresh, &w.store, &w.meta, &w.config).unwrap();
    fresh
}

fn accepted(rx: &Receiver<Filing>) -> usize {
    rx.try_iter()
        .filter(|f| f.record.outcome == Some(Outcome::Accepted))
        .count()
}

/// An adopted speculative absorb is bit-for-bit the summary that absorbing the stored pool entries
/// gives (the ordering guarantee: each batch is scored against every batch accepted before it).
/// Nothing flagged (a flag threshold no suspicion reaches here) and nothing unsure, so every accepted
/// batch enters the pool as delivered and its speculative copy may stand in for the stored entry.
fn nothing_flagged(w: &mut Worker) {
    let mut c = (*w.config).clone();
    c.model.flag_threshold = 1.0;
    c.admission.unsure_share = 0.0;
    c.admission.hold_suspicion = 1.0;
    w.config = Arc::new(c);
}

#[test]
fn adopted_speculative_absorb_equals_absorbing_the_stored_pool() {
    let tmp = tempfile::tempdir().unwrap();
    let (mut w, plant) = worker(tmp.path());
    nothing_flagged(&mut w);
    let (ftx, frx) = std::sync::mpsc::sync_channel(16);
    for i in 0..3 {
        submit(&mut w, &plant, i, &ftx);
    }
    let n = accepted(&frx);
    assert!(n >= 2, "clean batches of the plant are accepted ({n} of 3)");
    assert_eq!(
        w.shared.speculative_absorbs.load(Ordering::SeqCst),
        n as u64
    );
    let fresh = from_store(&w);
    assert_eq!(w.pool.through_seq, fresh.through_seq);
    assert_eq!(w.pool.summary.len(), w.store.pool_items().unwrap());
    assert!(w.pool.summary == fresh.summary, "the adopted copy differs");
}

/// With the default admission (flagged items held), an accepted batch with flagged items enters the
/// pool without them, so its speculative copy (the whole batch) is never adopted: the summary follows
/// the stored pool exactly.
#[test]
fn held_items_never_reach_the_summary_through_the_speculative_copy() {
    let tmp = tempfile::tempdir().unwrap();
    let (mut w, plant) = worker(tmp.path());
    let (ftx, frx) = std::sync::mpsc::sync_channel(16);
    for i in 0..3 {
        submit(&mut w, &plant, i, &ftx);
    }
    let filed: Vec<Filing> = frx.try_iter().collect();
    let with_held = filed
        .iter()
        .filter(|f| f.record.outcome == Some(Outcome::Accepted) && !f.record.held.is_empty())
        .count();
    assert!(with_held >= 1, "an accepted plant batch has flagged items");
    let adopted = w.shared.speculative_absorbs.load(Ordering::SeqCst) as usize;
    let accepted = filed
        .iter()
        .filter(|f| f.record.outcome == Some(Outcome::Accepted))
        .count();
    assert_eq!(adopted, accepted - with_held);
    let fresh = from_store(&w);
    assert_eq!(w.pool.summary.len(), w.store.pool_items().unwrap());
    // The held items reach only the labels model of the items as delivered (see the test below).
    let mut pool_model = w.pool.summary.clone();
    assert!(pool_model.delivered.take().is_some());
    assert!(pool_model == fresh.summary);
}

/// A pool entry committed by someone else while a batch is scored (a reviewer's release) makes the
/// worker fall back to absorbing from the store, in sequence order, instead of adopting its copy.
#[test]
fn a_concurrent_pool_change_falls_back_to_the_store_path() {
    let tmp = tempfile::tempdir().unwrap();
    let (mut w, plant) = worker(tmp.path());
    nothing_flagged(&mut w);
    let (ftx, frx) = std::sync::mpsc::sync_channel(16);
    submit(&mut w, &plant, 0, &ftx);
    assert_eq!(accepted(&frx), 1);
    // A release goes through the store without telling the worker (no `pool_changed`).
    let id = w.store.new_batch_id().unwrap();
    let rec = BatchRecord::claimed(id.clone(), "v", "r.csv".into(), format!("{id}.csv"));
    w.store.record_claim(&rec).unwrap();
    let (x, y) = plant.sample(80, 999);
    let entry = PoolEntry {
        batch_id: id.clone(),
        vendor: "v".into(),
        ids: scenario::item_ids("r", y.len()),
        labels: y,
        x: x.iter().copied().collect(),
        n_features: x.ncols(),
    };
    w.store
        .transition(
            &id,
            &[BatchState::Claimed],
            BatchState::Released,
            PoolChange::Add(entry),
            vec![],
            |_| {},
        )
        .unwrap();
    submit(&mut w, &plant, 1, &ftx);
    assert_eq!(accepted(&frx), 1);
    assert_eq!(w.shared.speculative_absorbs.load(Ordering::SeqCst), 1);
    let fresh = from_store(&w);
    assert_eq!(w.pool.through_seq, fresh.through_seq);
    assert_eq!(w.pool.summary.len(), 150 + 80 + 150);
    assert!(w.pool.summary == fresh.summary, "fallback differs");
}

/// A workspace without an in-house pool: the items of accepted batches kept out for review never
/// enter the pool summary, but those the trusted-anchored model does not doubt enter the model of the
/// items as delivered (the clean level's labels model); an exact rebuild from the stored (admitted)
/// pool keeps that model instead of refitting it from the selected items.
#[test]
fn kept_out_items_feed_the_labels_model_and_an_exact_rebuild_keeps_it() {
    let tmp = tempfile::tempdir().unwrap();
    let (mut w, plant) = worker(tmp.path());
    let (ftx, frx) = std::sync::mpsc::sync_channel(16);
    for i in 0..4 {
        submit(&mut w, &plant, i, &ftx);
    }
    let filed: Vec<Filing> = frx.try_iter().collect();
    let kept: usize = filed
        .iter()
        .filter(|f| f.record.outcome == Some(Outcome::Accepted))
        .map(|f| f.record.held.len())
        .sum();
    assert!(
        kept > 0,
        "clean plant batches have flagged items held for review"
    );
    let pool_items = w.store.pool_items().unwrap();
    assert_eq!(
        w.pool.summary.len(),
        pool_items,
        "held items never reach the pool"
    );
    let delivered = w
        .pool
        .summary
        .delivered
        .as_ref()
        .expect("a labels model of its own");
    assert!(
        delivered.len() > pool_items && delivered.len() <= pool_items + kept as u64,
        "{} items as delivered: {pool_items} admitted + some of {kept} kept out",
        delivered.len()
    );
    let labels = w.pool.summary.labels_model().unwrap();
    assert_ne!(labels, w.pool.summary.theta());
    // Force the exact rebuild a failed update asks for.
    w.pool.epoch = u64::MAX;
    w.catch_up_logged();
    assert_eq!(w.pool.summary.len(), pool_items);
    assert_eq!(
        w.pool.summary.labels_model(),
        Some(labels),
        "carried, not refitted"
    );
}
