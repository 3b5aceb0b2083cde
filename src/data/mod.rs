//! Labeled tables: parsing vendor batches, trusted sets and pools from CSV and JSON Lines.
//!
//! This module knows bytes and (for [`read_table`]) one path; it knows nothing of tokio or sled, so the
//! ingest path, the review commands and `labelweir assess` all parse through [`parse_table`].
//!
//! # The format
//!
//! * **CSV** (`.csv`): a header row, then one row per item. The column named by
//!   [`TableOptions::id_column`] (default `id`) holds an item id (unique within the file, non-empty), the
//!   column named by [`TableOptions::label_column`] (default `label`) a class name, and every other column a
//!   numeric feature. Fields may be quoted (RFC 4180). A UTF-8 byte-order mark is skipped. Blank lines are
//!   skipped. Header names are trimmed of surrounding spaces; ids and labels are kept exactly as given. Numeric cells may carry surrounding spaces; anything [`str::parse::<f64>`] rejects, an empty
//!   cell, or a value that is NaN or infinite (including `1e400`, which overflows) is an error.
//! * **JSON Lines** (`.jsonl`): one JSON object per line, with the same keys as the CSV columns. Blank lines
//!   are skipped. The id is a JSON string or an integer; the label is a JSON string; every feature is a
//!   **JSON number**. A JSON string in a feature, even one that reads as a number (`"1.5"`), is rejected:
//!   it usually means an export quoted everything, possibly with a locale's decimal comma, and guessing
//!   would hide that. `null`, arrays and objects are rejected too. A key repeated within one object is an
//!   error (JSON leaves its meaning open). serde_json's nesting limit (128 levels) stays on. Numbers are read
//!   by serde_json's default parser, which is correct to within one unit in the last place.
//!
//! Every file must have the same feature columns. When a `schema` (expected feature names, in order) is
//! given, a file may list its columns in any order, but the set must be exactly the schema; the returned
//! [`Table::features`] follow the schema's order.
//!
//! # Where an error points
//!
//! A [`DataError`] names the file, the data row and the column. Rows are **1-based data rows**: the header
//! is not a data row, so in a CSV file without quoted line breaks or blank lines, data row `r` is on file
//! line `r + 1`; in JSON Lines, data row `r` is the `r`-th non-blank line. The error also carries the
//! 1-based file line where the row starts ([`DataError::line`]), which is exact in both formats.
//!
//! Ids and labels must not contain control characters (they end up in notices, logs and terminals);
//! [`crate::text::sanitize`] is still applied wherever a vendor string is printed.

use std::fmt;
use std::io::Read;
use std::path::Path;

use ndarray::Array2;

use crate::text::quote_for_message;

mod columnar;
mod feature_table;
mod parse;
mod write;

pub use columnar::{write_parquet, write_parquet_features};
pub use feature_table::{join_features, FeatureTable, JoinError};
use parse::{locate_invalid_utf8, parse_csv, parse_jsonl, Builder, Shape};
pub use write::{write_csv, write_jsonl};

/// Input format of a labeled table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Format {
    /// Comma-separated values with a header row (`.csv`).
    Csv,
    /// One JSON object per line (`.jsonl`).
    JsonLines,
    /// Apache Parquet (`.parquet`), flat columns.
    Parquet,
}

impl Format {
    /// The format for a file extension (`csv` or `jsonl`, case-insensitive, without the dot).
    pub fn from_extension(ext: &str) -> Option<Self> {
        match ext.to_ascii_lowercase().as_str() {
            "csv" => Some(Self::Csv),
            "jsonl" => Some(Self::JsonLines),
            "parquet" => Some(Self::Parquet),
            _ => None,
        }
    }

    /// The format for a path, from its extension.
    pub fn from_path(path: &Path) -> Option<Self> {
        path.extension()
            .and_then(|e| e.to_str())
            .and_then(Self::from_extension)
    }

    /// The canonical extension, without the dot.
    pub fn extension(self) -> &'static str {
        match self {
            Self::Csv => "csv",
            Self::JsonLines => "jsonl",
            Self::Parquet => "parquet",
        }
    }
}

/// Size limits applied while parsing; exceeding any of them is an error, never a truncation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Limits {
    /// Largest accepted input, in bytes.
    pub max_bytes: usize,
    /// Most data rows (the header is not counted).
    pub max_rows: usize,
    /// Most columns, id and label included.
    pub max_columns: usize,
    /// Longest single field (CSV cell, JSON key or string value), in bytes.
    pub max_field_bytes: usize,
}

impl Default for Limits {
    /// 256 MiB, 1,000,000 rows, 1,024 columns, 4 KiB per field.
    fn default() -> Self {
        Self {
            max_bytes: 256 * 1024 * 1024,
            max_rows: 1_000_000,
            max_columns: 1024,
            max_field_bytes: 4096,
        }
    }
}

/// How to read a table: the names of the two special columns, and the limits.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TableOptions {
    /// Name of the item-id column (default `id`).
    pub id_column: String,
    /// Name of the label column (default `label`).
    pub label_column: String,
    /// Size limits.
    pub limits: Limits,
}

impl Default for TableOptions {
    fn default() -> Self {
        Self {
            id_column: "id".into(),
            label_column: "label".into(),
            limits: Limits::default(),
        }
    }
}

/// A parsed labeled table.
#[derive(Debug, Clone, PartialEq)]
pub struct Table {
    /// Where the table came from (file name or path), for messages.
    pub source: String,
    /// Item ids, one per row, unique and non-empty.
    pub ids: Vec<String>,
    /// Class names as given, one per row.
    pub labels: Vec<String>,
    /// Feature column names, in the order of [`Table::features`]' columns.
    pub feature_names: Vec<String>,
    /// Feature values, one row per item; every value is finite.
    pub features: Array2<f64>,
}

impl Table {
    /// Number of items.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// Whether the table has no items (parsing never returns one, but a table can be built by hand).
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// The labels as class indices; a label outside `classes` is an error naming its row and the label
    /// column (`label_column` is the name to report, normally [`TableOptions::label_column`]).
    pub fn class_indices_in(
        &self,
        classes: &Classes,
        label_column: &str,
    ) -> Result<Vec<usize>, DataError> {
        self.labels
            .iter()
            .enumerate()
            .map(|(i, l)| {
                classes.index_of(l).ok_or_else(|| {
                    DataError::new(
                        &self.source,
                        DataErrorKind::UnknownLabel {
                            label: l.clone(),
                            known: classes.names().to_vec(),
                        },
                    )
                    .at_row(i + 1, None)
                    .in_column(label_column)
                })
            })
            .collect()
    }

    /// The labels as class indices, reporting the label column as `label`; see
    /// [`Table::class_indices_in`] to name a renamed label column.
    pub fn class_indices(&self, classes: &Classes) -> Result<Vec<usize>, DataError> {
        self.class_indices_in(classes, "label")
    }

    /// The distinct class names of this table, sorted.
    pub fn classes(&self) -> Classes {
        Classes::from_labels(&self.labels)
    }

    /// The table as CSV bytes (header `id,label,<features>`), using the given names for the two special
    /// columns. Reading the bytes back with the same names gives an equal table.
    pub fn to_csv(&self, id_column: &str, label_column: &str) -> std::io::Result<Vec<u8>> {
        let mut out = Vec::new();
        write_csv(
            &mut out,
            (id_column, label_column),
            &self.ids,
            &self.labels,
            &self.feature_names,
            self.features.view(),
        )?;
        Ok(out)
    }
}

/// The class names of a problem in a fixed order (sorted by byte value), so that class `k` means the same
/// thing in every file and every run.
#[derive(Debug, Clone, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
pub struct Classes {
    names: Vec<String>,
}

impl Classes {
    /// The distinct labels among `labels`, sorted.
    pub fn from_labels<S: AsRef<str>>(labels: &[S]) -> Self {
        let mut names: Vec<String> = labels.iter().map(|s| s.as_ref().to_owned()).collect();
        names.sort();
        names.dedup();
        Self { names }
    }

    /// Class names, in index order.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// Number of classes.
    pub fn len(&self) -> usize {
        self.names.len()
    }

    /// Whether there are no classes.
    pub fn is_empty(&self) -> bool {
        self.names.is_empty()
    }

    /// Index of a class name.
    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.names.binary_search_by(|n| n.as_str().cmp(name)).ok()
    }

    /// Name of class `k`.
    pub fn name(&self, k: usize) -> Option<&str> {
        self.names.get(k).map(String::as_str)
    }
}

/// What went wrong while reading a table.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum DataErrorKind {
    /// The file could not be read.
    #[error("cannot read the file: {0}")]
    Io(String),
    /// The input is larger than [`Limits::max_bytes`].
    #[error("the file is larger than the limit of {limit} bytes")]
    TooLarge {
        /// The limit.
        limit: usize,
    },
    /// The input has no bytes, or only whitespace.
    #[error("the file is empty")]
    Empty,
    /// The first line is not a usable header.
    #[error("no header: {reason}")]
    NoHeader {
        /// Why.
        reason: String,
    },
    /// A header but no data rows.
    #[error("the file has a header but no data rows")]
    NoRows,
    /// The input is not valid UTF-8 (the error's row and column say where).
    #[error("not valid UTF-8 text (save the file as UTF-8)")]
    InvalidUtf8,
    /// A byte-order mark after the first one (an editor added one to a file that had one).
    #[error("a second byte-order mark at the start of the file; keep at most one")]
    ByteOrderMark,
    /// A carriage return not followed by a line feed (classic Mac line endings, or a stray CR).
    #[error("a carriage return without a line feed; save the file with LF or CRLF line endings")]
    BareCarriageReturn,
    /// A number written in a form the reader refuses (spaces around it, a leading `+`).
    #[error("not a plain number: \"{value}\" ({reason})")]
    NumberFormat {
        /// The cell as given (escaped, shortened).
        value: String,
        /// What is wrong with it.
        reason: &'static str,
    },
    /// A feature column in an `id,label` delivery (by-reference mode: features come from the workspace's
    /// feature table, never from a vendor file).
    #[error("column \"{name}\" is not accepted: this workspace takes features from its own feature table, so deliveries carry only the id and label columns")]
    FeaturesNotAccepted {
        /// The column's name.
        name: String,
    },
    /// A Parquet file that cannot be decoded.
    #[error("malformed Parquet: {0}")]
    Parquet(String),
    /// A required column (id, label, or a schema feature) is absent.
    #[error("missing column \"{name}\"{hint}")]
    MissingColumn {
        /// The column's name.
        name: String,
        /// Extra help, possibly empty (starts with a separator when not).
        hint: String,
    },
    /// A column that is not in the schema.
    #[error("unexpected column \"{name}\" (not among the expected feature columns)")]
    ExtraColumn {
        /// The column's name.
        name: String,
    },
    /// A column (or JSON key) appears twice.
    #[error("column \"{name}\" appears more than once")]
    DuplicateColumn {
        /// The column's name.
        name: String,
    },
    /// A header cell is empty.
    #[error("empty column name")]
    EmptyColumnName,
    /// Only id and label columns.
    #[error(
        "no feature columns (every column other than the id and the label is a numeric feature)"
    )]
    NoFeatures,
    /// A feature cell is not a number.
    #[error("not a number: \"{value}\"")]
    NotNumeric {
        /// The cell as given (escaped, shortened).
        value: String,
    },
    /// A feature cell is NaN or infinite (or overflows `f64`).
    #[error("not a finite number: \"{value}\"")]
    NonFinite {
        /// The cell as given (escaped, shortened).
        value: String,
    },
    /// A cell is empty (or JSON `null`).
    #[error("empty cell")]
    EmptyCell,
    /// A JSON value of the wrong type.
    #[error("expected {expected}, found {found}")]
    WrongType {
        /// What the column needs.
        expected: &'static str,
        /// What the file has.
        found: &'static str,
    },
    /// An empty item id.
    #[error("empty id")]
    EmptyId,
    /// An item id already used on an earlier row.
    #[error("duplicate id \"{id}\" (first used on row {first_row})")]
    DuplicateId {
        /// The id (escaped, shortened).
        id: String,
        /// The 1-based data row where it first appeared.
        first_row: usize,
    },
    /// An id or label contains a control character.
    #[error("control character in \"{value}\"")]
    ControlCharacter {
        /// The value (escaped, shortened).
        value: String,
    },
    /// A row has more or fewer cells than the header.
    #[error("row has {found} cells, the header has {expected}")]
    Ragged {
        /// Header width.
        expected: usize,
        /// This row's width.
        found: usize,
    },
    /// More data rows than [`Limits::max_rows`].
    #[error("more than {limit} data rows")]
    TooManyRows {
        /// The limit.
        limit: usize,
    },
    /// More columns than [`Limits::max_columns`].
    #[error("{found} columns, more than the limit of {limit}")]
    TooManyColumns {
        /// The limit.
        limit: usize,
        /// How many the file has.
        found: usize,
    },
    /// A field longer than [`Limits::max_field_bytes`].
    #[error("a field is longer than the limit of {limit} bytes")]
    FieldTooLong {
        /// The limit.
        limit: usize,
    },
    /// A CSV syntax error.
    #[error("malformed CSV: {0}")]
    Csv(String),
    /// A line that is not a JSON object.
    #[error("malformed JSON: {0}")]
    Json(String),
    /// A label that is not one of the trusted set's classes.
    #[error("unknown label \"{label}\" (the trusted set's classes are: {})", .known.join(", "))]
    UnknownLabel {
        /// The label (escaped, shortened).
        label: String,
        /// The known class names.
        known: Vec<String>,
    },
}

/// An input error that names the file, the data row and the column.
///
/// Display: `FILE, row R (line L), column "C": what went wrong`, leaving out the parts that do not apply.
/// See the [module documentation](self) for how rows map to file lines.
#[derive(Debug, Clone, PartialEq)]
pub struct DataError {
    /// The file (name or path as given).
    pub source: String,
    /// 1-based data row (the header is not a row), when the error is about one row.
    pub row: Option<usize>,
    /// 1-based file line where that row starts, when known.
    pub line: Option<usize>,
    /// The column, when the error is about one column.
    pub column: Option<String>,
    /// What went wrong (boxed, so that a `Result<_, DataError>` stays small).
    pub kind: Box<DataErrorKind>,
}

impl DataError {
    /// An error about `source` as a whole.
    pub fn new(source: &str, kind: DataErrorKind) -> Self {
        Self {
            source: source.to_owned(),
            row: None,
            line: None,
            column: None,
            kind: Box::new(kind),
        }
    }

    /// Point the error at a data row (and the file line where it starts, when known).
    pub fn at_row(mut self, row: usize, line: Option<usize>) -> Self {
        self.row = Some(row);
        self.line = line;
        self
    }

    /// Point the error at a file line that is not a data row (e.g. the header).
    pub fn at_line(mut self, line: usize) -> Self {
        self.line = Some(line);
        self
    }

    /// Point the error at a column.
    pub fn in_column(mut self, column: &str) -> Self {
        self.column = Some(column.to_owned());
        self
    }
}

impl fmt::Display for DataError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", quote_for_message(&self.source))?;
        match (self.row, self.line) {
            (Some(r), Some(l)) => write!(f, ", row {r} (line {l})")?,
            (Some(r), None) => write!(f, ", row {r}")?,
            (None, Some(l)) => write!(f, ", line {l}")?,
            (None, None) => {}
        }
        if let Some(c) = &self.column {
            write!(f, ", column \"{}\"", quote_for_message(c))?;
        }
        write!(f, ": {}", self.kind)
    }
}

// `DataError` has a field named `source` (the file), which thiserror would take for the error's cause, so
// `Error` is implemented by hand: the error has no underlying cause.
impl std::error::Error for DataError {}

/// Read a file's bytes (at most `limit` + 1, so an oversized file is seen) and its format from the
/// extension.
pub(crate) fn read_bytes(
    path: &Path,
    limit: usize,
) -> Result<(Vec<u8>, Format, String), DataError> {
    let source = path.display().to_string();
    let format = Format::from_path(path).ok_or_else(|| {
        DataError::new(
            &source,
            DataErrorKind::Io(
                "unknown file type: expected a .csv, .jsonl or .parquet extension".into(),
            ),
        )
    })?;
    let file = std::fs::File::open(path)
        .map_err(|e| DataError::new(&source, DataErrorKind::Io(e.to_string())))?;
    let mut bytes = Vec::new();
    file.take(limit as u64 + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| DataError::new(&source, DataErrorKind::Io(e.to_string())))?;
    Ok((bytes, format, source))
}

/// Read and parse a table from a file; the format comes from the extension (`.csv`, `.jsonl`,
/// `.parquet`), and [`DataError::source`] is the path as given.
pub fn read_table(
    path: &Path,
    opts: &TableOptions,
    schema: Option<&[String]>,
) -> Result<Table, DataError> {
    let (bytes, format, source) = read_bytes(path, opts.limits.max_bytes)?;
    parse_table(&bytes, format, &source, opts, schema)
}

/// Parse a labeled table from bytes.
///
/// `source` names the input in errors. `schema`, when given, is the expected feature column names in
/// order: the file's feature columns must be exactly that set (in any order), and the result follows the
/// schema's order. Without a schema, every column other than the id and label is a feature, in file order.
pub fn parse_table(
    bytes: &[u8],
    format: Format,
    source: &str,
    opts: &TableOptions,
    schema: Option<&[String]>,
) -> Result<Table, DataError> {
    parse_shaped(bytes, format, source, opts, schema, Shape::LABELED)
}

/// Parse an `id,label` table (a delivery in by-reference mode): the id and label columns and nothing
/// else; a feature column is refused with [`DataErrorKind::FeaturesNotAccepted`]. The result has no
/// feature columns (its features are joined from the feature table by id, see [`join_features`]).
pub fn parse_labels(
    bytes: &[u8],
    format: Format,
    source: &str,
    opts: &TableOptions,
) -> Result<Table, DataError> {
    parse_shaped(bytes, format, source, opts, None, Shape::LABELS_ONLY)
}

/// Parse any shape of table. The text checks (size, UTF-8, byte-order mark, line endings) come first and
/// apply to CSV and JSON Lines; Parquet is binary and has its own checks.
fn parse_shaped(
    bytes: &[u8],
    format: Format,
    source: &str,
    opts: &TableOptions,
    schema: Option<&[String]>,
    shape: Shape,
) -> Result<Table, DataError> {
    let err = |kind| DataError::new(source, kind);
    if bytes.len() > opts.limits.max_bytes {
        return Err(err(DataErrorKind::TooLarge {
            limit: opts.limits.max_bytes,
        }));
    }
    let mut builder = Builder::new(source, opts, shape);
    if format == Format::Parquet {
        columnar::read_parquet(bytes, &mut builder)?;
        return builder.finish(schema);
    }
    let text = match std::str::from_utf8(bytes) {
        Ok(t) => t,
        Err(e) => {
            return Err(locate_invalid_utf8(
                bytes,
                e.valid_up_to(),
                format,
                &builder,
            ))
        }
    };
    let text = text.strip_prefix('\u{FEFF}').unwrap_or(text);
    if text.starts_with('\u{FEFF}') {
        return Err(err(DataErrorKind::ByteOrderMark).at_line(1));
    }
    // A CR must end a line together with an LF: a bare CR is a line ending only to some readers, so the
    // rows (and the row numbers in any message) would depend on the reader. Ids, labels and numbers never
    // contain a CR (it is a control character), so a bare CR is an error wherever it is.
    let b = text.as_bytes();
    if let Some(i) = (0..b.len()).find(|&i| b[i] == b'\r' && b.get(i + 1) != Some(&b'\n')) {
        let line = 1 + b[..i].iter().filter(|c| **c == b'\n').count();
        return Err(err(DataErrorKind::BareCarriageReturn).at_line(line));
    }
    if text.trim().is_empty() {
        return Err(err(DataErrorKind::Empty));
    }
    match format {
        Format::Csv => parse_csv(text, &mut builder)?,
        Format::JsonLines => parse_jsonl(text, &mut builder, opts)?,
        Format::Parquet => {}
    }
    builder.finish(schema)
}

#[cfg(test)]
mod tests;
#[cfg(test)]
mod tests_formats;
