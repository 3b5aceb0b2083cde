//! The writers: a table as CSV or JSON Lines (the demo, the fixtures, `trusted export`).

use std::io::Write;

use ndarray::ArrayView2;

/// Shortest text that parses back to exactly `v` (Rust's `Debug` for `f64` round-trips and switches to
/// exponent notation for very large and very small magnitudes; the text is valid CSV and JSON).
fn number_text(v: f64) -> std::io::Result<String> {
    if v.is_finite() {
        Ok(format!("{v:?}"))
    } else {
        Err(std::io::Error::new(
            std::io::ErrorKind::InvalidInput,
            "cannot write a non-finite feature value",
        ))
    }
}

fn check_shapes(
    ids: &[String],
    labels: &[String],
    names: &[String],
    x: ArrayView2<'_, f64>,
) -> std::io::Result<()> {
    if ids.len() != x.nrows() || labels.len() != x.nrows() || names.len() != x.ncols() {
        return Err(std::io::Error::new(
            std::io::ErrorKind::InvalidInput,
            format!(
                "shape mismatch: {} ids, {} labels, {} names for a {}×{} feature matrix",
                ids.len(),
                labels.len(),
                names.len(),
                x.nrows(),
                x.ncols()
            ),
        ));
    }
    Ok(())
}

/// Write a labeled table as CSV: header `ID,LABEL,<names>` (with `columns = (ID, LABEL)`), then one row per
/// item. Numbers are written so that they parse back to the same `f64`; fields are quoted where needed.
pub fn write_csv<W: Write>(
    out: W,
    columns: (&str, &str),
    ids: &[String],
    labels: &[String],
    names: &[String],
    x: ArrayView2<'_, f64>,
) -> std::io::Result<()> {
    check_shapes(ids, labels, names, x)?;
    let mut w = csv::Writer::from_writer(out);
    let mut header = vec![columns.0.to_owned(), columns.1.to_owned()];
    header.extend(names.iter().cloned());
    w.write_record(&header)?;
    for (i, row) in x.rows().into_iter().enumerate() {
        let mut rec = vec![ids[i].clone(), labels[i].clone()];
        for v in row {
            rec.push(number_text(*v)?);
        }
        w.write_record(&rec)?;
    }
    w.flush()
}

/// Write a labeled table as JSON Lines: one object per item with keys `ID`, `LABEL` (from `columns`) and
/// one key per feature name, values as JSON numbers.
pub fn write_jsonl<W: Write>(
    mut out: W,
    columns: (&str, &str),
    ids: &[String],
    labels: &[String],
    names: &[String],
    x: ArrayView2<'_, f64>,
) -> std::io::Result<()> {
    check_shapes(ids, labels, names, x)?;
    for (i, row) in x.rows().into_iter().enumerate() {
        // Written by hand to keep the key order (serde_json's map sorts keys).
        let mut line = String::from("{");
        line.push_str(&serde_json::to_string(columns.0)?);
        line.push(':');
        line.push_str(&serde_json::to_string(&ids[i])?);
        line.push(',');
        line.push_str(&serde_json::to_string(columns.1)?);
        line.push(':');
        line.push_str(&serde_json::to_string(&labels[i])?);
        for (name, v) in names.iter().zip(row) {
            line.push(',');
            line.push_str(&serde_json::to_string(name)?);
            line.push(':');
            line.push_str(&number_text(*v)?);
        }
        line.push_str("}\n");
        out.write_all(line.as_bytes())?;
    }
    out.flush()
}
