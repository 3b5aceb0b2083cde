//! Unit tests of the stricter text rules (numbers, JSON ids, byte-order marks, line endings, invalid
//! UTF-8 by row and column), Parquet, feature tables and the by-reference join.
use super::*;
use ndarray::array;

fn opts() -> TableOptions {
    TableOptions::default()
}

fn csv_err(text: &[u8]) -> DataError {
    parse_table(text, Format::Csv, "b.csv", &opts(), None).unwrap_err()
}

#[test]
fn numbers_with_spaces_or_a_plus_sign_are_refused_by_row_and_column() {
    for (cell, why) in [
        ("\" 1.5\"", "spaces around the number"),
        (" 1.5", "spaces around the number"),
        ("1.5 ", "spaces around the number"),
        ("+1", "a leading plus sign"),
    ] {
        let e = csv_err(format!("id,label,a,b\nx,p,1,{cell}\n").as_bytes());
        assert!(
            matches!(&*e.kind, DataErrorKind::NumberFormat { reason, .. } if *reason == why),
            "{cell}: {e}"
        );
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(1), Some(2), Some("b"))
        );
    }
    // The plain forms still read.
    let t = parse_table(
        b"id,label,a\nx,p,-1.5e3\n",
        Format::Csv,
        "b.csv",
        &opts(),
        None,
    )
    .unwrap();
    assert_eq!(t.features, array![[-1500.0]]);
}

#[test]
fn a_second_byte_order_mark_is_refused() {
    let e = csv_err("\u{FEFF}\u{FEFF}id,label,a\nx,p,1\n".as_bytes());
    assert_eq!(
        (*e.kind.clone(), e.line),
        (DataErrorKind::ByteOrderMark, Some(1))
    );
    let e = parse_table(
        "\u{FEFF}\u{FEFF}{\"id\":\"x\",\"label\":\"p\",\"a\":1}\n".as_bytes(),
        Format::JsonLines,
        "b.jsonl",
        &opts(),
        None,
    )
    .unwrap_err();
    assert_eq!(*e.kind, DataErrorKind::ByteOrderMark);
    // One mark is fine.
    assert!(parse_table(
        "\u{FEFF}id,label,a\nx,p,1\n".as_bytes(),
        Format::Csv,
        "b.csv",
        &opts(),
        None
    )
    .is_ok());
}

#[test]
fn cr_only_line_endings_are_refused_with_their_line() {
    let e = csv_err(b"id,label,a\rx,p,1\ry,p,2\r");
    assert_eq!(
        (*e.kind.clone(), e.line),
        (DataErrorKind::BareCarriageReturn, Some(1))
    );
    // A stray CR on line 3 of an LF file.
    let e = csv_err(b"id,label,a\nx,p,1\ny,p,2\rz,p,3\n");
    assert_eq!(
        (*e.kind.clone(), e.line),
        (DataErrorKind::BareCarriageReturn, Some(3))
    );
}

#[test]
fn crlf_files_report_the_line_of_the_row() {
    // Row 3 is on line 4, in both formats, with CRLF line endings.
    let e = csv_err(b"id,label,a\r\nx,p,1\r\ny,p,2\r\nz,p,oops\r\n");
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(3), Some(4), Some("a"))
    );
    assert!(
        e.to_string()
            .starts_with("b.csv, row 3 (line 4), column \"a\""),
        "{e}"
    );
    let e = parse_table(
        b"{\"id\":\"x\",\"label\":\"p\",\"a\":1}\r\n{\"id\":\"y\",\"label\":\"p\",\"a\":1}\r\n{\"id\":\"z\",\"label\":\"p\",\"a\":\"1\"}\r\n",
        Format::JsonLines,
        "b.jsonl",
        &opts(),
        None,
    )
    .unwrap_err();
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(3), Some(3), Some("a"))
    );
}

#[test]
fn invalid_utf8_is_reported_by_row_and_column_not_byte_offset() {
    let e = csv_err(b"id,label,a\nx,p,1\ny,gl\xffass,2\n");
    assert_eq!(*e.kind, DataErrorKind::InvalidUtf8);
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(2), Some(3), Some("label"))
    );
    assert_eq!(
        e.to_string(),
        "b.csv, row 2 (line 3), column \"label\": not valid UTF-8 text (save the file as UTF-8)"
    );
    assert!(!e.to_string().contains("offset"));
    // In a quoted cell that spans two lines, and after a blank line: still the data row and its column.
    let e = csv_err(b"id,label,a\n\nx,\"p\nq\",1\ny,p,1\xc3\n");
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(2), Some(5), Some("a"))
    );
    let e = parse_table(
        b"{\"id\":\"x\",\"label\":\"p\",\"a\":1}\n\n{\"id\":\"y\xfe\",\"label\":\"p\",\"a\":1}\n",
        Format::JsonLines,
        "b.jsonl",
        &opts(),
        None,
    )
    .unwrap_err();
    assert_eq!(*e.kind, DataErrorKind::InvalidUtf8);
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(2), Some(3), Some("id"))
    );
}

fn sample() -> (Vec<String>, Vec<String>, Vec<String>, ndarray::Array2<f64>) {
    let ids = vec!["pl-0001".to_string(), "pl-0002".into(), "pl-0003".into()];
    let labels = vec!["pet".to_string(), "glass".into(), "pet".into()];
    let names = vec!["nir_1".to_string(), "mass_g".into()];
    let x = array![[0.1, 1e-300], [-2.5, 3.0e12], [1.0 / 3.0, 0.0]];
    (ids, labels, names, x)
}

#[test]
fn parquet_round_trips_double_and_float32_columns() {
    let (ids, labels, names, x) = sample();
    let mut out = Vec::new();
    write_parquet(
        &mut out,
        ("id", "label"),
        &ids,
        &labels,
        &names,
        x.view(),
        false,
    )
    .unwrap();
    assert_eq!(
        &out[..4],
        b"PAR1",
        "Parquet magic number (Apache Parquet file format specification)"
    );
    let t = parse_table(&out, Format::Parquet, "b.parquet", &opts(), None).unwrap();
    assert_eq!(
        (t.ids.clone(), t.labels.clone(), t.feature_names.clone()),
        (ids.clone(), labels.clone(), names.clone())
    );
    assert_eq!(t.features, x, "DOUBLE columns are exact");
    // FLOAT: every value is the nearest f32, and reading widens it exactly.
    let mut out = Vec::new();
    write_parquet(
        &mut out,
        ("id", "label"),
        &ids,
        &labels,
        &names,
        x.view(),
        true,
    )
    .unwrap();
    let t = parse_table(&out, Format::Parquet, "b.parquet", &opts(), None).unwrap();
    assert_eq!(t.features, x.mapv(|v| f64::from(v as f32)));
    assert_ne!(t.features, x, "1/3 is not a 32-bit float");
    // A feature table keeps FLOAT bits as they are.
    let values: Vec<f32> = vec![0.1, f32::MIN_POSITIVE, -7.25, f32::MAX, 1.0e-45, 3.0];
    let mut out = Vec::new();
    write_parquet_features(&mut out, "id", &ids, &names, &values).unwrap();
    let ft = FeatureTable::parse(&out, Format::Parquet, "f.parquet", &opts(), None).unwrap();
    assert_eq!(ft.ids, ids);
    assert_eq!(ft.names, names);
    assert_eq!(
        ft.values.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
        values.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
    );
    assert_eq!(ft.row(1), &values[2..4]);
}

/// A Parquet file with an OPTIONAL feature column holding a null in row 2.
fn parquet_with_null() -> Vec<u8> {
    use parquet::data_type::{ByteArray, ByteArrayType, DoubleType};
    use parquet::file::properties::WriterProperties;
    use parquet::file::writer::SerializedFileWriter;
    use parquet::schema::parser::parse_message_type;
    use std::sync::Arc;
    let schema = parse_message_type(
        "message m { REQUIRED BYTE_ARRAY id (UTF8); REQUIRED BYTE_ARRAY label (UTF8); OPTIONAL DOUBLE a; }",
    )
    .unwrap();
    let mut out = Vec::new();
    let mut w = SerializedFileWriter::new(
        &mut out,
        Arc::new(schema),
        Arc::new(WriterProperties::builder().build()),
    )
    .unwrap();
    let mut g = w.next_row_group().unwrap();
    let text = |v: &[&str]| v.iter().map(|s| ByteArray::from(*s)).collect::<Vec<_>>();
    let mut c = g.next_column().unwrap().unwrap();
    c.typed::<ByteArrayType>()
        .write_batch(&text(&["x", "y", "z"]), None, None)
        .unwrap();
    c.close().unwrap();
    let mut c = g.next_column().unwrap().unwrap();
    c.typed::<ByteArrayType>()
        .write_batch(&text(&["p", "p", "p"]), None, None)
        .unwrap();
    c.close().unwrap();
    let mut c = g.next_column().unwrap().unwrap();
    // Definition level 0 is a null (Parquet's definition levels for an OPTIONAL field).
    c.typed::<DoubleType>()
        .write_batch(&[1.0, 3.0], Some(&[1, 0, 1]), None)
        .unwrap();
    c.close().unwrap();
    g.close().unwrap();
    w.close().unwrap();
    out
}

#[test]
fn parquet_null_is_an_error_naming_row_and_column() {
    let bytes = parquet_with_null();
    let e = parse_table(&bytes, Format::Parquet, "week07.parquet", &opts(), None).unwrap_err();
    assert_eq!(*e.kind, DataErrorKind::EmptyCell);
    assert_eq!(
        (e.row, e.line, e.column.as_deref()),
        (Some(2), None, Some("a"))
    );
    assert_eq!(
        e.to_string(),
        "week07.parquet, row 2, column \"a\": empty cell"
    );
}

#[test]
fn parquet_wrong_schema_names_the_file_and_column() {
    // Features given as strings: the label column is fine, the feature column is not.
    let ids = vec!["x".to_string()];
    let mut out = Vec::new();
    write_parquet_features(&mut out, "id", &ids, &["label".to_string()], &[1.0]).unwrap();
    let e = parse_table(&out, Format::Parquet, "week07.parquet", &opts(), None).unwrap_err();
    // The label column is FLOAT here.
    assert_eq!(e.column.as_deref(), Some("label"));
    let m = e.to_string();
    assert!(
        m.starts_with("week07.parquet, column \"label\": expected a string column"),
        "{m}"
    );
    assert!(m.contains("FLOAT"), "{m}");
    // A feature column of strings.
    let (ids, labels, _, _) = sample();
    let mut out = Vec::new();
    write_parquet(
        &mut out,
        ("id", "label"),
        &ids,
        &labels,
        &[],
        ndarray::Array2::zeros((3, 0)).view(),
        false,
    )
    .unwrap();
    let e = parse_labels(&out, Format::Parquet, "w.parquet", &opts());
    assert!(
        e.is_ok(),
        "an id,label Parquet file is a valid by-reference delivery"
    );
    // Garbage with a .parquet name.
    let e = parse_table(
        b"id,label,a\nx,p,1\n",
        Format::Parquet,
        "w.parquet",
        &opts(),
        None,
    )
    .unwrap_err();
    assert!(matches!(&*e.kind, DataErrorKind::Parquet(_)), "{e}");
    assert!(
        e.to_string().starts_with("w.parquet: malformed Parquet"),
        "{e}"
    );
}

#[test]
fn feature_tables_read_without_labels_and_check_the_f32_range() {
    let ft = FeatureTable::parse(
        b"id,e0,e1\na,0.5,1\nb,-2,3e-3\n",
        Format::Csv,
        "emb.csv",
        &opts(),
        None,
    )
    .unwrap();
    assert_eq!(ft.names, vec!["e0", "e1"]);
    assert_eq!(ft.values, vec![0.5, 1.0, -2.0, 3e-3]);
    let e = FeatureTable::parse(
        b"id,e0\na,1\nb,1e39\n",
        Format::Csv,
        "emb.csv",
        &opts(),
        None,
    )
    .unwrap_err();
    assert!(matches!(&*e.kind, DataErrorKind::NonFinite { .. }), "{e}");
    assert_eq!((e.row, e.column.as_deref()), (Some(2), Some("e0")));
    // A duplicate id inside one table file is refused.
    let e = FeatureTable::parse(b"id,e0\na,1\na,2\n", Format::Csv, "emb.csv", &opts(), None)
        .unwrap_err();
    assert!(
        matches!(&*e.kind, DataErrorKind::DuplicateId { first_row: 1, .. }),
        "{e}"
    );
}

#[test]
fn id_label_deliveries_refuse_feature_columns_and_join_by_id() {
    let e = parse_labels(b"id,label,e0\nx,pet,1\n", Format::Csv, "w.csv", &opts()).unwrap_err();
    assert!(
        matches!(&*e.kind, DataErrorKind::FeaturesNotAccepted { name } if name == "e0"),
        "{e}"
    );
    assert_eq!(e.column.as_deref(), Some("e0"));
    let t = parse_labels(b"id,label\nb,glass\na,pet\n", Format::Csv, "w.csv", &opts()).unwrap();
    assert_eq!(t.features.ncols(), 0);
    let names = vec!["e0".to_string(), "e1".to_string()];
    let table = |id: &str| match id {
        "a" => Some(vec![0.1f32, 2.0]),
        "b" => Some(vec![-1.0f32, 0.5]),
        _ => None,
    };
    let j = join_features(t, &names, table).unwrap();
    assert_eq!(j.feature_names, names);
    // Row order is the delivery's; values are the f32 widened exactly.
    assert_eq!(j.features, array![[-1.0, 0.5], [f64::from(0.1f32), 2.0]]);
    let t = parse_labels(
        b"id,label\na,pet\nzz,glass\nb,pet\nyy,pet\n",
        Format::Csv,
        "w.csv",
        &opts(),
    )
    .unwrap();
    let e = join_features(t, &names, table).unwrap_err();
    assert_eq!((e.missing_count, e.total), (2, 4));
    assert_eq!(e.first, vec![(2, "zz".to_string()), (4, "yy".to_string())]);
    assert_eq!(
        e.to_string(),
        "2 of 4 items have no features in the workspace's feature table (first: row 2 \"zz\", row 4 \"yy\")"
    );
}
