//! Feature tables: item features kept by the team, keyed by item id, stored as 32-bit floats; and the
//! join that gives an `id,label` delivery its features.
//!
//! A feature-table file has an id column (named like the batches' id column) and one numeric column per
//! feature, and **no label column** (a label there would be a column named like a feature). It is read from
//! CSV, JSON Lines or Parquet with the same rules as a labeled table (see the [module
//! documentation](super)). Values are kept as `f32`: a Parquet `FLOAT` column is kept bit for bit; a
//! `DOUBLE` column or a decimal text is rounded to the nearest `f32` (IEEE 754 round-to-nearest-even, what
//! Rust's `as f32` does); a value beyond the `f32` range is an error naming its row and column.

use std::path::Path;

use ndarray::Array2;

use super::parse::Shape;
use super::{DataError, DataErrorKind, Format, Table, TableOptions};

/// Rows of team-maintained features, keyed by item id.
#[derive(Debug, Clone, PartialEq)]
pub struct FeatureTable {
    /// Where the rows came from (file name or path), for messages.
    pub source: String,
    /// Item ids, unique and non-empty.
    pub ids: Vec<String>,
    /// Feature column names, in the order of each row's values.
    pub names: Vec<String>,
    /// Values, row-major: `ids.len() × names.len()`.
    pub values: Vec<f32>,
}

impl FeatureTable {
    /// Number of rows.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// Whether there are no rows.
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// The features of row `i`.
    pub fn row(&self, i: usize) -> &[f32] {
        let d = self.names.len();
        &self.values[i * d..(i + 1) * d]
    }

    /// Parse a feature table from bytes. `schema`, when given, is the expected feature names in order (the
    /// workspace's), as for [`super::parse_table`].
    pub fn parse(
        bytes: &[u8],
        format: Format,
        source: &str,
        opts: &TableOptions,
        schema: Option<&[String]>,
    ) -> Result<Self, DataError> {
        let t = super::parse_shaped(bytes, format, source, opts, schema, Shape::FEATURES_ONLY)?;
        let d = t.feature_names.len();
        let mut values = Vec::with_capacity(t.len() * d);
        for (i, row) in t.features.rows().into_iter().enumerate() {
            for (j, v) in row.iter().enumerate() {
                let f = *v as f32;
                if !f.is_finite() {
                    return Err(DataError::new(
                        source,
                        DataErrorKind::NonFinite {
                            value: format!("{v:e} (beyond the 32-bit float range)"),
                        },
                    )
                    .at_row(i + 1, None)
                    .in_column(&t.feature_names[j]));
                }
                values.push(f);
            }
        }
        Ok(Self {
            source: t.source,
            ids: t.ids,
            names: t.feature_names,
            values,
        })
    }

    /// Read a feature table from a file (`.csv`, `.jsonl` or `.parquet`).
    pub fn read(
        path: &Path,
        opts: &TableOptions,
        schema: Option<&[String]>,
    ) -> Result<Self, DataError> {
        let (bytes, format, source) = super::read_bytes(path, opts.limits.max_bytes)?;
        Self::parse(&bytes, format, &source, opts, schema)
    }
}

/// Ids of a delivery that have no row in the feature table.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{} of {total} items have no features in the workspace's feature table (first: {})", .missing_count, .first.iter().map(|(r, id)| format!("row {r} \"{}\"", crate::text::quote_for_message(id))).collect::<Vec<_>>().join(", "))]
pub struct JoinError {
    /// How many ids are missing.
    pub missing_count: usize,
    /// Items in the delivery.
    pub total: usize,
    /// The first missing ones (at most 10): 1-based data row and id.
    pub first: Vec<(usize, String)>,
}

/// Give an `id,label` table its features: row `i` gets `lookup(ids[i])`, widened from `f32` to `f64`
/// (exact). Every id must be found; otherwise nothing is joined and the error lists the missing ids. The
/// table's own feature columns (there are none in an `id,label` delivery) are replaced.
pub fn join_features(
    mut table: Table,
    names: &[String],
    mut lookup: impl FnMut(&str) -> Option<Vec<f32>>,
) -> Result<Table, JoinError> {
    let d = names.len();
    let n = table.len();
    let mut x = Array2::<f64>::zeros((n, d));
    let mut missing = 0usize;
    let mut first = Vec::new();
    for (i, id) in table.ids.iter().enumerate() {
        match lookup(id) {
            Some(v) if v.len() == d => {
                for (j, f) in v.iter().enumerate() {
                    x[[i, j]] = f64::from(*f);
                }
            }
            _ => {
                missing += 1;
                if first.len() < 10 {
                    first.push((i + 1, id.clone()));
                }
            }
        }
    }
    if missing > 0 {
        return Err(JoinError {
            missing_count: missing,
            total: n,
            first,
        });
    }
    table.feature_names = names.to_vec();
    table.features = x;
    Ok(table)
}
