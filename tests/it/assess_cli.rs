//! The `labelweir assess` contract, through the binary, on the recycling-plant fixtures in `fixtures/`
//! (regenerate them with `cargo run --example make_fixtures`): the JSON document and its sort order, exit
//! codes 0 / 1 / 2, messages naming file, row and column, JSON Lines input, renamed special columns,
//! `--mode`, `--config`, and hostile numbers.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use labelweir::eval::metrics::{auroc, spearman};
use serde_json::Value;
use tempfile::TempDir;

use super::util::{bin, on_a_terminal};

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn fx(name: &str) -> String {
    fixture(name).display().to_string()
}

/// Run `labelweir assess ARGS`; returns (exit code, stdout, stderr).
fn assess(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(bin())
        .arg("assess")
        .args(args)
        .output()
        .expect("run labelweir");
    (
        out.status.code().expect("exit code"),
        String::from_utf8(out.stdout).expect("UTF-8 stdout"),
        String::from_utf8(out.stderr).expect("UTF-8 stderr"),
    )
}

/// Run with `--json` and parse the document.
fn assess_json(args: &[&str]) -> (i32, Value) {
    let mut a = args.to_vec();
    a.push("--json");
    let (code, out, err) = assess(&a);
    let doc = serde_json::from_str(&out).unwrap_or_else(|e| panic!("not JSON ({e}): {out}\n{err}"));
    (code, doc)
}

/// `fixtures/truth/<batch>`: id → whether the label was flipped.
fn truth(batch: &str) -> HashMap<String, bool> {
    let text = std::fs::read_to_string(fixture(&format!("truth/{batch}"))).unwrap();
    text.lines()
        .skip(1)
        .map(|l| {
            let c: Vec<&str> = l.split(',').collect();
            (c[0].to_string(), c[3] == "true")
        })
        .collect()
}

fn items(doc: &Value) -> &Vec<Value> {
    doc["items"].as_array().expect("items array")
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// AUROC of the suspicion against the planted flips, matching by id (so a row/id mix-up in the output
/// would show as chance level).
fn auroc_by_id(doc: &Value, batch: &str) -> f64 {
    let t = truth(batch);
    let (s, p): (Vec<f64>, Vec<bool>) = items(doc)
        .iter()
        .map(|it| (num(&it["suspicion"]), t[it["id"].as_str().unwrap()]))
        .unzip();
    auroc(&s, &p).expect("both classes present")
}

#[test]
fn clean_batch_exits_0_and_the_json_keeps_the_contract() {
    let (code, doc) = assess_json(&[
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("pool.csv"),
        &fx("batch-clean.csv"),
    ]);
    assert_eq!(code, 0, "{doc:#}");
    assert_eq!(doc["verdict"], "accept");
    assert_eq!(doc["exit_code"], 0);
    let cost = num(&doc["repair_cost"]);
    assert!((0.0..=1.0).contains(&cost));
    assert!(
        cost < 0.02,
        "a clean batch should cost about nothing to repair: {cost}"
    );
    // The damage is what the report says it is, the change of the trusted set's loss caused by the batch
    // (shown to fail by a planted defect: `damage` printed with the wrong sign), and an
    // accepted batch at cold start is inside the default cold-start limit of 0.05 nats.
    let damage = num(&doc["damage"]);
    let with_batch = num(&doc["trusted_loss"]["with_batch"]);
    let pool = num(&doc["trusted_loss"]["pool"]);
    assert!(
        (damage - (with_batch - pool)).abs() < 1e-9,
        "damage {damage} vs trusted loss {with_batch} - {pool}"
    );
    assert!(damage <= 0.05, "an accepted batch's damage {damage}");
    assert!(doc["note"].as_str().unwrap().contains("not proof"));
    // One entry per batch row, each with the contract's keys, ids and labels as in the file.
    let file = labelweir::data::read_table(
        &fixture("batch-clean.csv"),
        &labelweir::data::TableOptions::default(),
        None,
    )
    .unwrap();
    let given: HashMap<&str, &str> = file
        .ids
        .iter()
        .map(String::as_str)
        .zip(file.labels.iter().map(String::as_str))
        .collect();
    let items = items(&doc);
    assert_eq!(items.len(), file.len());
    let classes: Vec<&str> = doc["classes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c.as_str().unwrap())
        .collect();
    assert_eq!(classes, labelweir::scenario::CLASS_NAMES);
    let mut seen = std::collections::HashSet::new();
    for it in items {
        let id = it["id"].as_str().unwrap();
        assert!(seen.insert(id), "id {id} twice");
        assert_eq!(it["label"].as_str(), Some(given[id]));
        assert_eq!(file.ids[it["row"].as_u64().unwrap() as usize - 1], id);
        assert!(classes.contains(&it["proposed_label"].as_str().unwrap()));
        for key in ["suspicion", "confidence"] {
            let v = num(&it[key]);
            assert!((0.0..=1.0).contains(&v), "{key} = {v}");
        }
    }
    // Sorted by suspicion, highest first.
    let s: Vec<f64> = items.iter().map(|it| num(&it["suspicion"])).collect();
    assert!(s.windows(2).all(|w| w[0] >= w[1]), "not sorted: {s:?}");
    // Extras that must be there and truthful.
    assert_eq!(doc["inputs"]["mode"], "incremental");
    assert_eq!(doc["inputs"]["pool_items"], 1500);
    assert!(doc["pool_summary"]["memory_bytes"].as_u64().unwrap() > 0);
    assert!(doc["convergence"]["converged"].is_boolean());
    assert!(num(&doc["timings_ms"]["total"]) > 0.0);
    let per_class_items: u64 = doc["per_class"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["items"].as_u64().unwrap())
        .sum();
    assert_eq!(per_class_items, 300);
    let trusted_ids: Vec<&str> = doc["broken_trusted"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["id"].as_str().unwrap())
        .collect();
    assert!(trusted_ids.iter().all(|id| id.starts_with("trusted-")));
}

#[test]
fn poisoned_batches_exit_1_and_their_flipped_items_rank_high() {
    for (batch, min_auroc) in [
        ("batch-region-flip.csv", 0.9),
        ("batch-uniform-flip.csv", 0.9),
    ] {
        let (code, doc) = assess_json(&[
            "--trusted",
            &fx("trusted.csv"),
            "--pool",
            &fx("pool.csv"),
            &fx(batch),
        ]);
        assert_eq!(code, 1, "{batch}: {:#}", doc["reasons"]);
        assert_eq!(doc["verdict"], "quarantine");
        assert!(!doc["reasons"].as_array().unwrap().is_empty());
        let a = auroc_by_id(&doc, batch);
        println!("{batch}: AUROC {a:.3}");
        assert!(a >= min_auroc, "{batch}: AUROC {a}");
    }
}

#[test]
fn readable_report_has_summary_table_and_caution() {
    let (code, out, _) = assess(&[
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("pool.csv"),
        &fx("batch-region-flip.csv"),
        "--top",
        "5",
    ]);
    assert_eq!(code, 1);
    assert!(out.contains("would be QUARANTINED"), "{out}");
    assert!(out.contains("repair cost:"), "{out}");
    assert!(out.contains("damage:"), "{out}");
    assert!(out.contains("top 5 suspects of 300"), "{out}");
    let table_rows = out
        .lines()
        .filter(|l| {
            l.trim_start().starts_with(|c: char| c.is_ascii_digit()) && l.contains("acme-0002-")
        })
        .count();
    assert_eq!(table_rows, 5, "{out}");
    assert!(
        out.contains("a suspicion for human review, not proof"),
        "{out}"
    );
}

/// Issue 15, item 5: a long `assess` shows the seconds elapsed on a terminal (`script` gives the command a
/// pseudo-terminal and copies what it shows), erases that line before the report, and draws nothing on a
/// pipe (the runs above capture stderr). Shown to fail with the terminal check inverted in
/// `cli::progress::with_elapsed`: the pipe run carried the line.
#[test]
fn assess_shows_its_elapsed_time_only_on_a_terminal() {
    let args = [
        "--trusted".to_string(),
        fx("trusted.csv"),
        "--pool".to_string(),
        fx("pool.csv"),
        fx("batch-region-flip.csv"),
    ];
    let refs: Vec<&str> = args.iter().map(String::as_str).collect();
    let (code, out, err) = assess(&refs);
    assert_eq!(code, 1, "{err}");
    assert!(!err.contains("assess: scoring"), "drawn on a pipe: {err}");
    assert!(!out.contains("assess: scoring"), "{out}");
    let (code, shown) = on_a_terminal(&format!("{} assess {}", bin(), args.join(" ")));
    assert_eq!(code, Some(1), "{shown}");
    assert!(
        shown.contains("assess: scoring 300 items (time budget 30.0 s): 0.0 s"),
        "{shown}"
    );
    let erased = shown.find("\r\x1b[K").expect("the line is erased");
    let report = shown.find("would be QUARANTINED").expect("the report");
    assert!(erased < report, "erased before the report: {shown}");
}

#[test]
fn jsonl_batch_scores_like_the_same_csv_batch() {
    let run = |b: &str| {
        assess_json(&[
            "--trusted",
            &fx("trusted.csv"),
            "--pool",
            &fx("pool.csv"),
            &fx(b),
        ])
    };
    let (c1, csv) = run("batch-clean.csv");
    let (c2, jsonl) = run("batch-clean.jsonl");
    assert_eq!((c1, c2), (0, 0));
    assert!((num(&csv["repair_cost"]) - num(&jsonl["repair_cost"])).abs() < 1e-9);
    assert!((num(&csv["damage"]) - num(&jsonl["damage"])).abs() < 1e-9);
    let by_id = |d: &Value| -> HashMap<String, f64> {
        items(d)
            .iter()
            .map(|it| {
                (
                    it["id"].as_str().unwrap().to_string(),
                    num(&it["suspicion"]),
                )
            })
            .collect()
    };
    let (a, b) = (by_id(&csv), by_id(&jsonl));
    assert_eq!(a.len(), 300);
    for (id, s) in &a {
        assert!((s - b[id]).abs() < 1e-9, "{id}: {s} vs {}", b[id]);
    }
}

#[test]
fn renamed_special_columns() {
    let args = [
        "--trusted",
        &fx("trusted-renamed-columns.csv"),
        &fx("batch-renamed-columns.csv"),
    ];
    let (code, doc) = assess_json(
        &[
            &args[..],
            &["--id-column", "item", "--label-column", "material"],
        ]
        .concat(),
    );
    assert_eq!(code, 0, "{doc:#}");
    assert_eq!(items(&doc).len(), 300);
    assert!(items(&doc)
        .iter()
        .all(|it| it["id"].as_str().unwrap().starts_with("acme-0001-")));
    // Without the flags the default names are missing, and the message says which, where.
    let (code, out, err) = assess(&args);
    assert_eq!(code, 2);
    assert!(out.is_empty());
    assert!(
        err.contains("trusted-renamed-columns.csv") && err.contains("column \"id\""),
        "{err}"
    );
}

#[test]
fn every_malformed_batch_exits_2_naming_file_row_and_column() {
    // (fixture, what the message must contain besides the file name)
    let cases: &[(&str, &[&str])] = &[
        ("bad/empty.csv", &["the file is empty"]),
        ("bad/header-only.csv", &["no data rows"]),
        (
            "bad/missing-column.csv",
            &["column \"label\"", "missing column"],
        ),
        (
            "bad/extra-column.csv",
            &["column \"conveyor_speed\"", "unexpected column"],
        ),
        (
            "bad/non-numeric.csv",
            &["row 3", "column \"weight_g\"", "not a number", "12,5g"],
        ),
        (
            "bad/duplicate-id.csv",
            &[
                "row 4",
                "column \"id\"",
                "duplicate id",
                "first used on row 2",
            ],
        ),
        (
            "bad/unknown-label.csv",
            &["row 5", "column \"label\"", "unknown label \"styrofoam\""],
        ),
        ("bad/ragged-row.csv", &["row 2", "33 cells", "34"]),
        (
            "bad/nan-cell.csv",
            &["row 6", "column \"density_g_cm3\"", "not a finite number"],
        ),
        ("bad/truncated.jsonl", &["row 2", "malformed JSON"]),
    ];
    for (file, needles) in cases {
        let (code, out, err) = assess(&["--trusted", &fx("trusted.csv"), &fx(file), "--json"]);
        assert_eq!(code, 2, "{file}: {err}");
        assert!(
            out.is_empty(),
            "{file}: nothing on stdout on error, got {out}"
        );
        // Under --json the error is one JSON object on stderr; its message is what a reader sees.
        let v: serde_json::Value = serde_json::from_str(err.trim())
            .unwrap_or_else(|e| panic!("{file}: stderr is not one JSON object ({e}): {err}"));
        assert_eq!(v["exit_code"], 2, "{file}: {err}");
        let err = v["error"].as_str().expect("error message").to_string();
        let name = Path::new(file).file_name().unwrap().to_str().unwrap();
        assert!(err.contains(name), "{file}: {err}");
        for n in *needles {
            assert!(err.contains(n), "{file}: expected {n:?} in {err}");
        }
    }
}

#[test]
fn bad_trusted_pool_and_config_exit_2_too() {
    let dir = TempDir::new().unwrap();
    // A pool file with an unknown label names the pool file.
    let (code, _, err) = assess(&[
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("bad/unknown-label.csv"),
        &fx("batch-clean.csv"),
    ]);
    assert_eq!(code, 2);
    assert!(
        err.contains("unknown-label.csv") && err.contains("row 5"),
        "{err}"
    );
    // The same pool file twice: duplicate ids across pool files.
    let (code, _, err) = assess(&[
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("pool.csv"),
        "--pool",
        &fx("pool.csv"),
        &fx("batch-clean.csv"),
    ]);
    assert_eq!(code, 2);
    assert!(
        err.contains("row 1") && err.contains("duplicate id"),
        "{err}"
    );
    // A trusted set with one class.
    let one = dir.path().join("one-class.csv");
    let text = std::fs::read_to_string(fixture("trusted.csv")).unwrap();
    let lines: Vec<&str> = text.lines().take(6).collect();
    std::fs::write(&one, lines.join("\n") + "\n").unwrap();
    let (code, _, err) = assess(&["--trusted", one.to_str().unwrap(), &fx("batch-clean.csv")]);
    assert_eq!(code, 2);
    assert!(
        err.contains("one-class.csv") && err.contains("at least two"),
        "{err}"
    );
    // Unknown config key; missing file; unknown extension.
    let cfg = dir.path().join("c.toml");
    std::fs::write(&cfg, "[model]\nl2_weight = 0.1\n").unwrap();
    let (code, _, err) = assess(&[
        "--trusted",
        &fx("trusted.csv"),
        &fx("batch-clean.csv"),
        "--config",
        cfg.to_str().unwrap(),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains("l2_weight"), "{err}");
    let (code, _, err) = assess(&["--trusted", &fx("trusted.csv"), "nowhere.csv"]);
    assert_eq!(code, 2);
    assert!(err.contains("nowhere.csv"), "{err}");
    let (code, _, err) = assess(&[
        "--trusted",
        &fx("trusted.csv"),
        &fx("pool.csv").replace(".csv", ".txt"),
    ]);
    assert_eq!(code, 2);
    assert!(err.contains(".csv, .jsonl or .parquet"), "{err}");
}

#[test]
fn config_policy_and_model_sections_are_used() {
    let dir = TempDir::new().unwrap();
    // Limits so loose that nothing is quarantined: the region-flipped batch now exits 0.
    let cfg = dir.path().join("loose.toml");
    std::fs::write(
        &cfg,
        "[policy]\ncold_start_max_repair_cost = 1.0\ncold_start_max_damage_nats = 100.0\n\
         max_repair_cost = 1.0\nmax_damage_nats = 100.0\nfit_cusum_h = 1e9\n\n[model]\nflag_threshold = 0.9\n",
    )
    .unwrap();
    let (code, doc) = assess_json(&[
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("pool.csv"),
        &fx("batch-region-flip.csv"),
        "--config",
        cfg.to_str().unwrap(),
    ]);
    assert_eq!(code, 0, "{:#}", doc["reasons"]);
    assert_eq!(doc["verdict"], "accept");
    assert!((num(&doc["flag_threshold"]) - 0.9).abs() < 1e-12);
}

/// Both modes give the same verdict on a clean batch (accept) and on a region-flipped one (quarantine),
/// rank the suspects alike, and say which mode ran. Shown to fail by a planted defect (the `--mode exact`
/// run given the other batch: the verdicts differ).
///
/// The uniform-flip fixture is not used: it sits near the cold-start damage limit and the modes' damage on
/// it differs (measured 0.10 vs 0.05 nats), so its verdict may legitimately differ between the modes; that
/// gap is the engine's to close (written down for the engine's owner).
#[test]
fn exact_and_incremental_modes_agree_and_say_which_ran() {
    let run = |batch: &str, mode: &str| {
        assess_json(&[
            "--trusted",
            &fx("trusted.csv"),
            "--pool",
            &fx("pool.csv"),
            &fx(batch),
            "--mode",
            mode,
        ])
    };
    let by_id = |d: &Value| -> HashMap<String, f64> {
        items(d)
            .iter()
            .map(|it| {
                (
                    it["id"].as_str().unwrap().to_string(),
                    num(&it["suspicion"]),
                )
            })
            .collect()
    };
    for (batch, code, verdict) in [
        ("batch-clean.csv", 0, "accept"),
        ("batch-region-flip.csv", 1, "quarantine"),
    ] {
        let (c1, inc) = run(batch, "incremental");
        let (c2, exact) = run(batch, "exact");
        assert_eq!(inc["inputs"]["mode"], "incremental");
        assert_eq!(exact["inputs"]["mode"], "exact");
        assert!(exact["pool_summary"].is_null());
        assert!(inc["pool_summary"].is_object());
        assert_eq!(
            (c1, c2),
            (code, code),
            "{batch}: incremental {:#}, exact {:#}",
            inc["reasons"],
            exact["reasons"]
        );
        assert_eq!(inc["verdict"], verdict, "{batch}");
        assert_eq!(exact["verdict"], verdict, "{batch}");
        // The engine's own tests hold the modes to Spearman ≥ 0.99 on benchmark cases; here the command must
        // wire both modes to the same problem.
        let (a, b) = (by_id(&inc), by_id(&exact));
        assert_eq!(a.len(), b.len());
        let ids: Vec<&String> = a.keys().collect();
        let sa: Vec<f64> = ids.iter().map(|i| a[*i]).collect();
        let sb: Vec<f64> = ids.iter().map(|i| b[*i]).collect();
        let rho = spearman(&sa, &sb).unwrap();
        assert!(rho > 0.95, "{batch}: Spearman {rho}");
    }
}

#[test]
fn no_pool_cold_start_runs_with_a_cross_fitted_reference() {
    let (code, doc) = assess_json(&["--trusted", &fx("trusted.csv"), &fx("batch-clean.csv")]);
    assert!(code == 0 || code == 1, "{doc:#}");
    assert_eq!(doc["inputs"]["pool_items"], 0);
    assert_eq!(doc["reference"], "cross_fit");
    assert!(doc["pool_summary"].is_null());
}

#[test]
fn hostile_numbers_give_finite_output_not_a_crash() {
    // One class only, a constant feature, a duplicated feature and magnitudes around 1e12: the command
    // must answer with finite numbers (exit 0 or 1), never crash or print NaN.
    let dir = TempDir::new().unwrap();
    let text = std::fs::read_to_string(fixture("batch-clean.csv")).unwrap();
    let mut lines = text.lines();
    let header = lines.next().unwrap();
    let mut out = format!("{header}\n");
    for l in lines.take(120) {
        let mut c: Vec<String> = l.split(',').map(str::to_owned).collect();
        c[1] = "glass".into();
        c[2] = "0.5".into(); // constant
        c[4] = c[3].clone(); // duplicated
        let v: f64 = c[5].parse().unwrap();
        c[5] = format!("{:e}", v * 1e12); // huge magnitude
        out.push_str(&c.join(","));
        out.push('\n');
    }
    let batch = dir.path().join("hostile.csv");
    std::fs::write(&batch, out).unwrap();
    let (code, out, err) = assess(&[
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("pool.csv"),
        batch.to_str().unwrap(),
        "--json",
    ]);
    assert!(code == 0 || code == 1, "exit {code}: {err}");
    let doc: Value = serde_json::from_str(&out).unwrap();
    // serde_json prints a NaN or an infinity as null, and `num` fails on null: these are the finiteness
    // checks. The repair cost is a share of the label mass; the damage is still the trusted loss's change.
    let cost = num(&doc["repair_cost"]);
    assert!((0.0..=1.0).contains(&cost), "repair cost {cost}");
    let damage = num(&doc["damage"]);
    let change = num(&doc["trusted_loss"]["with_batch"]) - num(&doc["trusted_loss"]["pool"]);
    assert!(
        (damage - change).abs() < 1e-9,
        "damage {damage} vs {change}"
    );
    for it in items(&doc) {
        // `num` fails on null, which is what serde_json prints for a NaN.
        for key in [
            "suspicion",
            "confidence",
            "repair_mass",
            "repair_signal",
            "learner_doubt",
            "anchored_doubt",
            "neighbour_doubt",
            "wrong_probability",
            "repair_weight",
        ] {
            let v = num(&it[key]);
            assert!((0.0..=1.0).contains(&v), "{key} = {v}");
        }
    }
}

#[test]
fn vendor_strings_never_reach_the_terminal_raw() {
    // An id with an ANSI escape: rejected, and the message shows it escaped, not as a raw control byte.
    let dir = TempDir::new().unwrap();
    let text = std::fs::read_to_string(fixture("batch-clean.csv")).unwrap();
    let evil = text.replacen("acme-0001-000002", "\"acme\u{1b}[2J-2\"", 1);
    let batch = dir.path().join("evil.csv");
    std::fs::write(&batch, evil).unwrap();
    let (code, _, err) = assess(&["--trusted", &fx("trusted.csv"), batch.to_str().unwrap()]);
    assert_eq!(code, 2);
    assert!(
        err.contains("row 2") && err.contains("control character"),
        "{err}"
    );
    assert!(!err.contains('\u{1b}'), "raw escape in {err:?}");
}

/// The flagged items told as stories: on the wet-cardboard fixture (cardboard delivered as paper) the
/// largest story is paper → cardboard, it holds most of the planted flips (`fixtures/truth/`), and the
/// trusted items nearest it carry cardboard more often than paper. Every id in a story carries the story's
/// given label and proposed label in `items` (fails if the grouping mixed pairs), and the stories are
/// ordered largest first. The readable report leads with the same stories.
#[test]
fn flagged_items_are_told_as_stories_backed_by_nearby_trusted_items() {
    let batch = "batch-wet-cardboard-as-paper.csv";
    let args = [
        "--trusted",
        &fx("trusted.csv"),
        "--pool",
        &fx("pool.csv"),
        &fx(batch),
    ];
    let (code, doc) = assess_json(&args);
    assert_eq!(code, 1);
    let stories = doc["stories"].as_array().expect("stories array");
    assert!(!stories.is_empty(), "{doc}");
    let by_id: HashMap<&str, &Value> = items(&doc)
        .iter()
        .map(|it| (it["id"].as_str().unwrap(), it))
        .collect();
    let mut in_stories = 0;
    for (k, s) in stories.iter().enumerate() {
        let ids = s["ids"].as_array().unwrap();
        assert_eq!(ids.len() as u64, s["items"].as_u64().unwrap());
        if k > 0 {
            assert!(
                stories[k - 1]["items"].as_u64() >= s["items"].as_u64(),
                "{s}"
            );
        }
        for id in ids {
            let it = by_id[id.as_str().unwrap()];
            assert_eq!(it["label"], s["label"], "{id} in {s}");
            assert_eq!(it["proposed_label"], s["proposed_label"], "{id} in {s}");
            assert_eq!(it["flagged"], true, "{id} in {s}");
        }
        let near = s["trusted_nearby"].as_u64().unwrap();
        assert!(
            s["trusted_nearby_proposed"].as_u64().unwrap()
                + s["trusted_nearby_given"].as_u64().unwrap()
                <= near
        );
        in_stories += ids.len();
    }
    // Every flagged item with a proposed change is in exactly one story.
    let changed = items(&doc)
        .iter()
        .filter(|it| it["flagged"] == true && it["label"] != it["proposed_label"])
        .count();
    assert_eq!(in_stories, changed);

    let top = &stories[0];
    assert_eq!(
        (top["label"].as_str(), top["proposed_label"].as_str()),
        (Some("paper"), Some("cardboard"))
    );
    let t = truth(batch);
    let planted = top["ids"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|id| t[id.as_str().unwrap()])
        .count();
    let all_planted = t.values().filter(|f| **f).count();
    assert!(
        planted * 3 >= all_planted * 2,
        "{planted} of {all_planted} planted flips in {top}"
    );
    assert!(
        top["trusted_nearby_proposed"].as_u64() > top["trusted_nearby_given"].as_u64(),
        "{top}"
    );

    let (_, out, _) = assess(&args);
    let story = out
        .lines()
        .skip_while(|l| !l.starts_with("flagged items by story"))
        .nth(1)
        .unwrap_or_else(|| panic!("no stories in the readable report:\n{out}"));
    assert!(story.contains("labeled paper, proposed cardboard"), "{out}");
    assert!(
        story.contains("the trusted set backs the proposal"),
        "{out}"
    );
}
