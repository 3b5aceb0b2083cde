//! Unit tests of the table reader and writers.
use super::*;
use proptest::prelude::*;

fn csv(text: &str) -> Result<Table, DataError> {
    parse_table(
        text.as_bytes(),
        Format::Csv,
        "b.csv",
        &TableOptions::default(),
        None,
    )
}

fn jsonl(text: &str) -> Result<Table, DataError> {
    parse_table(
        text.as_bytes(),
        Format::JsonLines,
        "b.jsonl",
        &TableOptions::default(),
        None,
    )
}

fn kind(r: Result<Table, DataError>) -> DataErrorKind {
    *r.expect_err("should fail").kind
}

#[test]
fn parses_csv_with_quotes_bom_blank_lines_and_spaces() {
    let t = csv("\u{FEFF}id,label,a,b\n\"x,1\",pet,1.5,2\n\ny2,glass,-3e2,0\n").unwrap();
    assert_eq!(t.ids, vec!["x,1", "y2"]);
    assert_eq!(t.labels, vec!["pet", "glass"]);
    assert_eq!(t.feature_names, vec!["a", "b"]);
    assert_eq!(t.features, ndarray::array![[1.5, 2.0], [-300.0, 0.0]]);
}

#[test]
fn schema_reorders_columns_and_rejects_other_sets() {
    let schema = vec!["b".to_string(), "a".to_string()];
    let opts = TableOptions::default();
    let t = parse_table(
        b"label,a,id,b\npet,1,x,2\n",
        Format::Csv,
        "f.csv",
        &opts,
        Some(&schema),
    )
    .unwrap();
    assert_eq!(t.feature_names, schema);
    assert_eq!(t.features, ndarray::array![[2.0, 1.0]]);
    let e = parse_table(
        b"id,label,a\nx,pet,1\n",
        Format::Csv,
        "f.csv",
        &opts,
        Some(&schema),
    )
    .unwrap_err();
    assert!(
        matches!(*e.kind, DataErrorKind::MissingColumn { ref name, .. } if name == "b"),
        "{e}"
    );
    assert_eq!(e.column.as_deref(), Some("b"));
    let e = parse_table(
        b"id,label,a,b,c\nx,pet,1,2,3\n",
        Format::Csv,
        "f.csv",
        &opts,
        Some(&schema),
    )
    .unwrap_err();
    assert!(
        matches!(*e.kind, DataErrorKind::ExtraColumn { ref name } if name == "c"),
        "{e}"
    );
}

#[test]
fn errors_name_file_row_line_and_column() {
    let e = csv("id,label,a,b\nx,pet,1,2\ny,pet,1,oops\n").unwrap_err();
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(2), Some(3), Some("b"))
    );
    assert_eq!(
        e.to_string(),
        "b.csv, row 2 (line 3), column \"b\": not a number: \"oops\""
    );
    let e = jsonl("{\"id\":\"x\",\"label\":\"pet\",\"a\":1}\n\n{\"id\":\"y\",\"label\":\"pet\",\"a\":\"1\"}\n")
        .unwrap_err();
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(2), Some(3), Some("a"))
    );
    assert!(matches!(*e.kind, DataErrorKind::WrongType { .. }));
}

#[test]
fn each_malformed_input_has_its_own_error() {
    assert_eq!(kind(csv("")), DataErrorKind::Empty);
    assert_eq!(kind(csv(" \n\n")), DataErrorKind::Empty);
    assert_eq!(kind(csv("id,label,a\n")), DataErrorKind::NoRows);
    assert_eq!(kind(csv("id,label\nx,pet\n")), DataErrorKind::NoFeatures);
    assert!(
        matches!(kind(csv("1,2,3\n4,5,6\n")), DataErrorKind::MissingColumn { hint, .. } if hint.contains("header"))
    );
    assert!(
        matches!(kind(csv("id,a\nx,1\n")), DataErrorKind::MissingColumn { name, .. } if name == "label")
    );
    assert!(matches!(
        kind(csv("id,label,a,a\nx,p,1,2\n")),
        DataErrorKind::DuplicateColumn { .. }
    ));
    assert_eq!(
        kind(csv("id,label,,a\nx,p,1,2\n")),
        DataErrorKind::EmptyColumnName
    );
    assert!(matches!(
        kind(csv("id,label,a\nx,p,nan\n")),
        DataErrorKind::NonFinite { .. }
    ));
    assert!(matches!(
        kind(csv("id,label,a\nx,p,inf\n")),
        DataErrorKind::NonFinite { .. }
    ));
    assert!(matches!(
        kind(csv("id,label,a\nx,p,1e400\n")),
        DataErrorKind::NonFinite { .. }
    ));
    assert_eq!(kind(csv("id,label,a\nx,p,\n")), DataErrorKind::EmptyCell);
    assert_eq!(kind(csv("id,label,a\n ,p,1\n")), DataErrorKind::EmptyId);
    assert!(matches!(
        kind(csv("id,label,a\nx,p,1\nx,p,2\n")),
        DataErrorKind::DuplicateId { first_row: 1, .. }
    ));
    assert!(matches!(
        kind(csv("id,label,a\nx,p,1,2\n")),
        DataErrorKind::Ragged {
            expected: 3,
            found: 4
        }
    ));
    assert!(matches!(
        kind(csv("id,label,a\nx,p\n")),
        DataErrorKind::Ragged {
            expected: 3,
            found: 2
        }
    ));
    assert!(matches!(
        kind(csv("id,label,a\n\"x\u{1b}[31m\",p,1\n")),
        DataErrorKind::ControlCharacter { .. }
    ));
    assert!(matches!(
        kind(csv("id,label,a\nx,\"p\u{202E}\",1\n")),
        DataErrorKind::ControlCharacter { .. }
    ));
    assert!(matches!(kind(jsonl("[1,2]\n")), DataErrorKind::Json(_)));
    assert!(matches!(
        kind(jsonl("{\"id\":\"x\",\"label\":\"p\",\"a\":1,\"a\":2}\n")),
        DataErrorKind::DuplicateColumn { .. }
    ));
    assert!(matches!(
        kind(jsonl("{\"id\":\"x\",\"label\":\"p\",\"a\":null}\n")),
        DataErrorKind::EmptyCell
    ));
    assert!(matches!(
        kind(jsonl(
            "{\"id\":\"x\",\"label\":\"p\",\"a\":1}\n{\"id\":\"y\",\"label\":\"p\"}\n"
        )),
        DataErrorKind::MissingColumn { .. }
    ));
    assert!(matches!(kind(jsonl("{\"id\":\"x\",\"label\":\"p\",\"a\":1}\n{\"id\":\"y\",\"label\":\"p\",\"a\":1,\"b\":2}\n")), DataErrorKind::ExtraColumn { .. }));
    assert!(matches!(
        kind(jsonl("{\"id\":\"x\",\"label\":3,\"a\":1}\n")),
        DataErrorKind::WrongType { .. }
    ));
    assert!(matches!(
        kind(jsonl("{\"id\":\"x\",\"label\":\"p\",\"a\":1e400}\n")),
        DataErrorKind::Json(_)
    ));
}

#[test]
fn json_ids_must_be_strings_and_nesting_is_limited() {
    let t = jsonl("{\"id\":\"17\",\"label\":\"p\",\"a\":1}\r\n").unwrap();
    assert_eq!(t.ids, vec!["17"]);
    // A number id has many spellings (17, 17.0, 1.7e1) and drops leading zeros: refused, by row and column.
    let e = jsonl("{\"id\":\"x\",\"label\":\"p\",\"a\":1}\n{\"id\":17,\"label\":\"p\",\"a\":1}\n")
        .unwrap_err();
    assert!(
        matches!(
            *e.kind,
            DataErrorKind::WrongType {
                found: "a number",
                ..
            }
        ),
        "{e}"
    );
    assert_eq!((e.row, e.column.as_deref()), (Some(2), Some("id")));
    let deep = format!(
        "{{\"id\":\"x\",\"label\":\"p\",\"a\":{}{}}}",
        "[".repeat(200),
        "]".repeat(200)
    );
    let e = jsonl(&deep).unwrap_err();
    assert!(e.to_string().contains("recursion limit"), "{e}");
}

#[test]
fn limits_are_errors_not_truncations() {
    let limits = Limits {
        max_bytes: 1000,
        max_rows: 2,
        max_columns: 4,
        max_field_bytes: 8,
    };
    let opts = TableOptions {
        limits,
        ..TableOptions::default()
    };
    let p = |s: &str| {
        parse_table(s.as_bytes(), Format::Csv, "f.csv", &opts, None)
            .unwrap_err()
            .kind
            .as_ref()
            .clone()
    };
    assert_eq!(
        p("id,label,a\nx,p,1\ny,p,1\nz,p,1\n"),
        DataErrorKind::TooManyRows { limit: 2 }
    );
    assert_eq!(
        p("id,label,a,b,c\nx,p,1,1,1\n"),
        DataErrorKind::TooManyColumns { limit: 4, found: 5 }
    );
    assert_eq!(
        p("id,label,a\nxxxxxxxxxx,p,1\n"),
        DataErrorKind::FieldTooLong { limit: 8 }
    );
    assert_eq!(
        p(&"x".repeat(1001)),
        DataErrorKind::TooLarge { limit: 1000 }
    );
}

#[test]
fn renamed_special_columns() {
    let opts = TableOptions {
        id_column: "item".into(),
        label_column: "material".into(),
        ..TableOptions::default()
    };
    let t = parse_table(
        b"item,material,a\nx,pet,1\n",
        Format::Csv,
        "f.csv",
        &opts,
        None,
    )
    .unwrap();
    assert_eq!((t.ids[0].as_str(), t.labels[0].as_str()), ("x", "pet"));
    let classes = Classes::from_labels(&["pet", "glass"]);
    let t2 = parse_table(
        b"item,material,a\nx,paper,1\n",
        Format::Csv,
        "f.csv",
        &opts,
        None,
    )
    .unwrap();
    let e = t2.class_indices_in(&classes, "material").unwrap_err();
    assert_eq!((e.row, e.column.as_deref()), (Some(1), Some("material")));
    assert_eq!(t.class_indices(&classes).unwrap(), vec![1]);
}

#[test]
fn classes_are_sorted_and_unique() {
    let c = Classes::from_labels(&["pp", "glass", "pp", "aluminium"]);
    assert_eq!(c.names(), ["aluminium", "glass", "pp"]);
    assert_eq!((c.index_of("glass"), c.index_of("paper")), (Some(1), None));
}

/// Strategy: a valid table (ids unique, labels plain, features finite).
fn table_strategy() -> impl Strategy<Value = (Vec<String>, Vec<String>, Vec<String>, Vec<Vec<f64>>)>
{
    (1usize..6, 1usize..8).prop_flat_map(|(d, n)| {
        let names = proptest::collection::hash_set("[a-z][a-z0-9_]{0,6}", d)
            .prop_filter("not special", |s| !s.contains("id") && !s.contains("label"));
        let ids = proptest::collection::hash_set("[A-Za-z0-9,\"' é-]{1,10}", n)
            .prop_filter("non-blank", |s| s.iter().all(|i| !i.trim().is_empty()));
        let labels = proptest::collection::vec("[a-z,\" ]{1,6}", n);
        let x = proptest::collection::vec(
            proptest::collection::vec(
                prop_oneof![proptest::num::f64::NORMAL, -1e6..1e6f64, Just(0.0)],
                d,
            ),
            n,
        );
        (names, ids, labels, x).prop_map(|(names, ids, labels, x)| {
            (
                names.into_iter().collect(),
                ids.into_iter().collect(),
                labels,
                x,
            )
        })
    })
}

proptest! {
    #[test]
    fn never_panics_on_arbitrary_bytes(bytes in proptest::collection::vec(any::<u8>(), 0..400)) {
        for f in [Format::Csv, Format::JsonLines] {
            let _ = parse_table(&bytes, f, "fuzz", &TableOptions::default(), None);
        }
    }

    #[test]
    fn never_panics_on_csv_like_text(text in "[a-z0-9,\"\n. e+-]{0,200}") {
        let with_header = format!("id,label,a\n{text}");
        for t in [text.as_str(), with_header.as_str()] {
            for f in [Format::Csv, Format::JsonLines] {
                if let Err(e) = parse_table(t.as_bytes(), f, "fuzz", &TableOptions::default(), None) {
                    // The message is built from the error's parts, in the documented order:
                    // `FILE, row R (line L), column "C": what`.
                    let m = e.to_string();
                    let mut head = "fuzz".to_string();
                    match (e.row, e.line) {
                        (Some(r), Some(l)) => head.push_str(&format!(", row {r} (line {l})")),
                        (Some(r), None) => head.push_str(&format!(", row {r}")),
                        (None, Some(l)) => head.push_str(&format!(", line {l}")),
                        (None, None) => {}
                    }
                    if let Some(c) = &e.column {
                        head.push_str(&format!(", column \"{}\"", crate::text::quote_for_message(c)));
                    }
                    prop_assert!(m.starts_with(&format!("{head}: ")), "{m}");
                    prop_assert_eq!(&m[head.len() + 2..], e.kind.to_string());
                    // A row is never past the input's last line, and a row is always given with its line
                    // in the text formats.
                    let lines = t.split('\n').count();
                    if let Some(l) = e.line {
                        prop_assert!(l >= 1 && l <= lines, "line {} of {}: {}", l, lines, m);
                    }
                    if let Some(r) = e.row {
                        prop_assert!(e.line.is_some_and(|l| r < l + usize::from(f == Format::JsonLines)), "{m}");
                    }
                }
            }
        }
    }

    #[test]
    fn valid_tables_round_trip((names, ids, labels, rows) in table_strategy()) {
        let labels: Vec<String> = labels.into_iter().map(|l| if l.is_empty() { "x".into() } else { l }).collect();
        let n = ids.len();
        let d = names.len();
        let x = Array2::from_shape_fn((n, d), |(i, j)| rows[i][j]);
        let mut c = Vec::new();
        write_csv(&mut c, ("id", "label"), &ids, &labels, &names, x.view()).unwrap();
        let mut j = Vec::new();
        write_jsonl(&mut j, ("id", "label"), &ids, &labels, &names, x.view()).unwrap();
        let mut p = Vec::new();
        write_parquet(&mut p, ("id", "label"), &ids, &labels, &names, x.view(), false).unwrap();
        for (bytes, f) in [(c, Format::Csv), (j, Format::JsonLines), (p, Format::Parquet)] {
            let t = parse_table(&bytes, f, "rt", &TableOptions::default(), None)
                .map_err(|e| TestCaseError::fail(format!("{e}\n{}", String::from_utf8_lossy(&bytes))))?;
            prop_assert_eq!(&t.ids, &ids);
            prop_assert_eq!(&t.labels, &labels);
            prop_assert_eq!(&t.feature_names, &names);
            match f {
                // Bit-exact: the writer's number text parses back to the same f64 (CSV); DOUBLE columns
                // hold the f64 itself (Parquet).
                Format::Csv | Format::Parquet => prop_assert_eq!(&t.features, &x),
                // serde_json's default number parser is correct to within one ulp (exact parsing is its
                // opt-in `float_roundtrip` feature); allow 2 ulp.
                Format::JsonLines => {
                    for (a, b) in t.features.iter().zip(x.iter()) {
                        prop_assert!((a - b).abs() <= 4.5e-16 * b.abs(), "{} vs {}", a, b);
                    }
                }
            }
        }
    }
}

#[test]
fn a_one_column_header_with_another_delimiter_gets_a_hint() {
    for (text, name) in [
        ("id;label;a\nx;pet;1\n", "semicolon"),
        ("id\tlabel\ta\nx\tpet\t1\n", "tab"),
        ("id|label|a\nx|pet|1\n", "vertical-bar"),
    ] {
        match kind(csv(text)) {
            DataErrorKind::MissingColumn { name: col, hint } => {
                assert_eq!(col, "id");
                assert!(
                    hint.contains(&format!("looks {name}-separated"))
                        && hint.contains("reads comma-separated"),
                    "{name}: {hint}"
                );
            }
            other => panic!("{name}: {other:?}"),
        }
    }
    // Two columns, one of them with a semicolon in its name: no delimiter hint, the header is listed.
    match kind(csv("ident;x,label\nx,pet\n")) {
        DataErrorKind::MissingColumn { hint, .. } => {
            assert!(!hint.contains("separated"), "{hint}");
            assert!(hint.contains("the header has"), "{hint}");
        }
        other => panic!("{other:?}"),
    }
}
