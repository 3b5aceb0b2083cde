//! Features by reference (a team feature table, `id,label` deliveries), Parquet files, and a pool imported
//! at `init`, end to end through the binary.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use labelweir::scenario;
use labelweir::store::{BatchRecord, BatchState};

use crate::util::*;

const T: Duration = Duration::from_secs(120);

/// The trusted set (10 per class) as a batch, so its ids and features can go into a feature table.
fn trusted_batch() -> Batch {
    let (x, y) = plant().sample_per_class(10, 999);
    Batch {
        ids: scenario::item_ids("trusted", y.len()),
        flipped: vec![false; y.len()],
        labels: y,
        x,
    }
}

/// `id,label` bytes of a batch.
fn id_label_csv(b: &Batch) -> Vec<u8> {
    let mut out = String::from("id,label\n");
    for (id, l) in b.ids.iter().zip(scenario::label_names(&b.labels)) {
        out.push_str(&format!("{id},{l}\n"));
    }
    out.into_bytes()
}

/// A feature table of these batches as Parquet (`FLOAT` columns).
fn feature_parquet(batches: &[&Batch]) -> Vec<u8> {
    let all = concat(batches);
    let values: Vec<f32> = all.x.iter().map(|v| *v as f32).collect();
    let mut out = Vec::new();
    labelweir::data::write_parquet_features(
        &mut out,
        "id",
        &all.ids,
        &scenario::feature_names(),
        &values,
    )
    .unwrap();
    out
}

/// `labelweir init` with extra arguments and files (name, bytes) written beside the workspace first; the
/// config is tuned like [`Ws::new`]'s.
fn init_ws(files: &[(&str, Vec<u8>)], extra: &[&str]) -> Ws {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("ws");
    for (name, bytes) in files {
        std::fs::write(tmp.path().join(name), bytes).unwrap();
    }
    let mut args = vec!["init".to_string(), dir.display().to_string()];
    for a in extra {
        let p = tmp.path().join(a);
        args.push(if p.exists() {
            p.display().to_string()
        } else {
            a.to_string()
        });
    }
    let out = Command::new(bin()).args(&args).output().unwrap();
    assert!(
        out.status.success(),
        "init failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let ws = Ws { tmp, dir };
    ws.edit_config(&[
        ("quiet_period_ms = 2000", "quiet_period_ms = 150"),
        ("rescan_interval_secs = 60", "rescan_interval_secs = 1"),
        ("min_free_bytes = 67108864", "min_free_bytes = 1"),
        ("flagged = \"hold\"", "flagged = \"enter\""),
    ]);
    ws
}

fn records_by_name(store: &labelweir::store::Store, name: &str) -> Vec<BatchRecord> {
    store
        .batches()
        .unwrap()
        .into_iter()
        .filter(|r| r.original_name == name)
        .collect()
}

fn wait_for_files(dir: &Path, n: usize) {
    let t = Instant::now();
    while std::fs::read_dir(dir).map(|d| d.count()).unwrap_or(0) < n {
        assert!(t.elapsed() < T, "{} never got {n} files", dir.display());
        std::thread::sleep(Duration::from_millis(50));
    }
}

#[test]
fn by_reference_deliveries_are_joined_and_unknown_ids_and_feature_columns_refused() {
    let trusted = trusted_batch();
    let b1 = clean_batch("n1", 300, 1);
    let b2 = clean_batch("n2", 300, 2);
    let ws = init_ws(
        &[
            ("emb.parquet", feature_parquet(&[&trusted, &b1])),
            ("trusted.csv", id_label_csv(&trusted)),
        ],
        &[
            "--trusted",
            "trusted.csv",
            "--features",
            "emb.parquet",
            "--vendor",
            "north-sort",
            "--by",
            "expert-a",
        ],
    );
    let d = Daemon::start(&ws);
    ws.deliver("north-sort", "week01.csv", &id_label_csv(&b1));
    ws.wait_settled(1, T);
    // Ids the team never registered: the whole file is refused, naming the first ones.
    ws.deliver("north-sort", "week02.csv", &id_label_csv(&b2));
    ws.wait_settled(2, T);
    // A vendor file that brings its own features: refused; the table is not touched.
    let mut forged = clean_batch("n1", 300, 1);
    forged.x.fill(9.0);
    ws.deliver("north-sort", "week01-features.csv", &forged.csv());
    ws.wait_settled(3, T);
    // The team drops the missing features into its own folder; the re-delivery is then judged.
    let incoming = ws.path("features/incoming");
    std::fs::write(incoming.join(".n2.parquet.part"), feature_parquet(&[&b2])).unwrap();
    std::fs::rename(
        incoming.join(".n2.parquet.part"),
        incoming.join("n2.parquet"),
    )
    .unwrap();
    wait_for_files(&ws.path("features/imported"), 1);
    ws.deliver("north-sort", "week02-again.csv", &id_label_csv(&b2));
    ws.wait_settled(4, T);
    assert!(d.stop().success());

    let store = ws.store();
    let state = |name: &str| records_by_name(&store, name)[0].clone();
    assert_eq!(state("week01.csv").state, BatchState::Accepted);
    assert_eq!(state("week02-again.csv").state, BatchState::Accepted);
    let unknown = state("week02.csv");
    assert_eq!(unknown.state, BatchState::Rejected);
    let reason = unknown.reject.unwrap();
    assert_eq!(reason.code, "unknown_ids", "{}", reason.detail);
    assert!(
        reason.detail.contains("300 of 300 items have no features")
            && reason.detail.contains("row 1 \"n2-"),
        "{}",
        reason.detail
    );
    assert_eq!(reason.row, Some(1));
    let forged_rec = state("week01-features.csv");
    assert_eq!(forged_rec.state, BatchState::Rejected);
    let reason = forged_rec.reject.unwrap();
    assert_eq!(reason.code, "parse_error");
    assert!(
        reason.detail.contains("is not accepted"),
        "{}",
        reason.detail
    );
    // The stored features of n1 are still the team's (f32 of the plant's readings), not the forged 9.0.
    let row = store.feature_row(&b1.ids[0]).unwrap().unwrap();
    assert_eq!(row[0], b1.x[[0, 0]] as f32);
    // The pool holds both accepted batches with the table's features, widened exactly from f32.
    let pool = store.pool_entries_after(0).unwrap();
    assert_eq!(pool.len(), 2);
    let first = &pool[0].1;
    assert_eq!(first.x[0], f64::from(b1.x[[0, 0]] as f32));
    // Nothing a vendor delivered reached the trusted set or the feature table.
    assert_eq!(store.trusted_items().unwrap().len(), trusted.ids.len());
    assert_eq!(store.feature_rows().unwrap(), trusted.ids.len() + 600);
    let imports = store.feature_imports().unwrap();
    assert_eq!(
        imports
            .iter()
            .map(|i| (
                i.provenance.source.as_str(),
                i.provenance.by.as_str(),
                i.added
            ))
            .collect::<Vec<_>>(),
        vec![
            ("emb.parquet", "expert-a", 380),
            ("n2.parquet", "features/incoming", 300)
        ]
    );
    assert_eq!(
        ws.files_in("features/imported"),
        vec!["000002-n2.parquet".to_string()]
    );
}

#[test]
fn duplicate_ids_across_table_files_last_import_wins_and_is_audited() {
    let trusted = trusted_batch();
    let ws = init_ws(
        &[
            ("emb.csv", {
                let mut out = Vec::new();
                let all = concat(&[&trusted]);
                labelweir::data::write_csv(
                    &mut out,
                    ("id", "label"),
                    &all.ids,
                    &vec!["-".to_string(); all.ids.len()],
                    &scenario::feature_names(),
                    all.x.view(),
                )
                .unwrap();
                // A feature table has no label column: drop it.
                String::from_utf8(out)
                    .unwrap()
                    .lines()
                    .map(|l| {
                        let mut cells: Vec<&str> = l.split(',').collect();
                        cells.remove(1);
                        cells.join(",") + "\n"
                    })
                    .collect::<String>()
                    .into_bytes()
            }),
            ("trusted.csv", id_label_csv(&trusted)),
        ],
        &[
            "--trusted",
            "trusted.csv",
            "--features",
            "emb.csv",
            "--vendor",
            "v1",
        ],
    );
    // A second file: two known ids (one with new values, one unchanged) and one new id.
    let names = scenario::feature_names();
    let header = format!("id,{}\n", names.join(","));
    let row = |id: &str, x: Vec<f32>| {
        format!(
            "{id},{}\n",
            x.iter()
                .map(|v| format!("{v:?}"))
                .collect::<Vec<_>>()
                .join(",")
        )
    };
    let same: Vec<f32> = trusted.x.row(1).iter().map(|v| *v as f32).collect();
    let update = format!(
        "{header}{}{}{}",
        row(&trusted.ids[0], vec![0.25; names.len()]),
        row(&trusted.ids[1], same),
        row("extra-1", vec![1.5; names.len()])
    );
    let file = ws.tmp.path().join("update.csv");
    std::fs::write(&file, update).unwrap();
    let out = run_bin(&[
        "features",
        "add",
        &ws.dir.display().to_string(),
        &file.display().to_string(),
        "--by",
        "ml-team",
    ]);
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        stdout.contains("1 new ids, 2 replaced (1 with new values)"),
        "{stdout}"
    );
    // A file with one id twice is refused as a whole.
    let dup = ws.tmp.path().join("dup.csv");
    std::fs::write(
        &dup,
        format!(
            "{header}{}{}",
            row("extra-2", vec![1.0; names.len()]),
            row("extra-2", vec![2.0; names.len()])
        ),
    )
    .unwrap();
    let out = run_bin(&[
        "features",
        "add",
        &ws.dir.display().to_string(),
        &dup.display().to_string(),
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&out.stderr)
            .contains("duplicate id \"extra-2\" (first used on row 1)"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let store = ws.store();
    assert_eq!(
        store.feature_row(&trusted.ids[0]).unwrap().unwrap(),
        vec![0.25; names.len()]
    );
    assert_eq!(
        store.feature_row("extra-1").unwrap().unwrap(),
        vec![1.5; names.len()]
    );
    assert_eq!(store.feature_row("extra-2").unwrap(), None);
    let audit: Vec<_> = store
        .audit_since(0)
        .unwrap()
        .into_iter()
        .filter(|a| a.action == "features import")
        .collect();
    assert_eq!(audit.len(), 2);
    let last = &audit[1];
    assert_eq!(last.actor, "ml-team");
    assert_eq!(last.detail["replaced"], 2);
    assert_eq!(last.detail["changed"], 1);
    assert_eq!(last.detail["changed_ids"][0], trusted.ids[0].as_str());
    assert_eq!(last.detail["provenance"]["source"], "update.csv");
    // The trusted set keeps the features it was verified with.
    let t0 = store
        .trusted_items()
        .unwrap()
        .into_iter()
        .find(|t| t.id == trusted.ids[0])
        .unwrap();
    // Trusted items are stored as JSON, whose default number reader is exact to within one unit in the
    // last place (serde_json's documentation), hence the tolerance: the point is that the value is the
    // verified one, not the 0.25 of the later import.
    let verified = f64::from(trusted.x[[0, 0]] as f32);
    assert!(
        (t0.features[0] - verified).abs() <= 2.3e-16 * verified.abs(),
        "{} vs {verified}",
        t0.features[0]
    );
}

fn sha256_hex(bytes: &[u8]) -> String {
    use sha2::Digest;
    hex::encode(sha2::Sha256::digest(bytes))
}

#[test]
fn a_pool_imported_at_init_is_the_first_batch_reference() {
    let pool = concat(&[&clean_batch("p1", 400, 41), &clean_batch("p2", 400, 42)]);
    let mut pool_parquet = Vec::new();
    labelweir::data::write_parquet(
        &mut pool_parquet,
        ("id", "label"),
        &pool.ids,
        &scenario::label_names(&pool.labels),
        &scenario::feature_names(),
        pool.x.view(),
        false,
    )
    .unwrap();
    let ws = init_ws(
        &[
            ("trusted.csv", trusted_csv(10)),
            ("pool.parquet", pool_parquet.clone()),
        ],
        &[
            "--trusted",
            "trusted.csv",
            "--pool",
            "pool.parquet",
            "--vendor",
            "north-sort",
            "--by",
            "ml-lead",
        ],
    );
    {
        let store = ws.store();
        assert_eq!(store.pool_items().unwrap(), 800);
        let imports = store.pool_imports().unwrap();
        assert_eq!(imports.len(), 1, "800 items fit one chunk");
        let (entry_id, p) = &imports[0];
        assert_eq!(entry_id, "pool-import-1-0001");
        assert_eq!(p.provenance.source, "pool.parquet");
        assert_eq!(p.provenance.sha256, sha256_hex(&pool_parquet));
        assert_eq!(p.provenance.by, "ml-lead");
        let audit = store.audit_since(0).unwrap();
        let rec = audit.iter().find(|a| a.action == "pool import").unwrap();
        assert_eq!(rec.detail["items"], 800);
        assert_eq!(rec.detail["sha256"], sha256_hex(&pool_parquet).as_str());
    }
    let d = Daemon::start(&ws);
    // The first batch is a poisoned one: it is scored with the imported pool as the reference model.
    let region = region_flipped_batch("r1", 300, 43, 0.2);
    ws.deliver("north-sort", "week01.csv", &region.csv());
    ws.wait_settled(1, T);
    let (_, metrics) = http_get(d.addr, "/metrics").unwrap();
    assert!(d.stop().success());
    let pool_line = metrics
        .lines()
        .find(|l| l.starts_with("labelweir_pool_items "))
        .unwrap_or_else(|| panic!("no pool gauge in {metrics}"));
    assert_eq!(pool_line, "labelweir_pool_items 800");
    let store = ws.store();
    let rec = &records_by_name(&store, "week01.csv")[0];
    assert_eq!(rec.state, BatchState::Quarantined, "{rec:?}");
    let a = store.assessment(&rec.id).unwrap().unwrap();
    assert_eq!(a.sizes.pool, 800, "scored against the imported pool");
    assert_eq!(
        a.reference, "pool",
        "the imported pool is the reference model, not a cross-fit"
    );
}

#[test]
fn a_pool_with_an_unknown_class_or_wrong_columns_is_refused_and_nothing_is_created() {
    let tmp = tempfile::tempdir().unwrap();
    let trusted = tmp.path().join("trusted.csv");
    std::fs::write(&trusted, trusted_csv(5)).unwrap();
    let pool = tmp.path().join("pool.csv");
    let mut bad = clean_batch("p", 20, 5);
    bad.labels[3] = 0;
    let text = String::from_utf8(bad.csv())
        .unwrap()
        .replacen(",aluminium,", ",unobtainium,", 1);
    std::fs::write(&pool, text).unwrap();
    let dir: PathBuf = tmp.path().join("ws");
    let out = run_bin(&[
        "init",
        &dir.display().to_string(),
        "--trusted",
        &trusted.display().to_string(),
        "--pool",
        &pool.display().to_string(),
        "--vendor",
        "v1",
    ]);
    assert_eq!(
        out.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("unknown label \"unobtainium\""),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(!dir.join("state").exists(), "nothing created");
}
