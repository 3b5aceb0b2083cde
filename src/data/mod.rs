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

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::io::{Read, Write};
use std::path::Path;

use ndarray::{Array2, ArrayView2};

use crate::text::{is_unsafe_char, quote_for_message};

/// Input format of a labeled table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Format {
    /// Comma-separated values with a header row (`.csv`).
    Csv,
    /// One JSON object per line (`.jsonl`).
    JsonLines,
}

impl Format {
    /// The format for a file extension (`csv` or `jsonl`, case-insensitive, without the dot).
    pub fn from_extension(ext: &str) -> Option<Self> {
        match ext.to_ascii_lowercase().as_str() {
            "csv" => Some(Self::Csv),
            "jsonl" => Some(Self::JsonLines),
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
    /// The input is not valid UTF-8.
    #[error("invalid UTF-8 (byte offset {offset})")]
    InvalidUtf8 {
        /// Byte offset of the first invalid byte.
        offset: usize,
    },
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

/// Read and parse a table from a file; the format comes from the extension (`.csv`, `.jsonl`), and
/// [`DataError::source`] is the path as given.
pub fn read_table(
    path: &Path,
    opts: &TableOptions,
    schema: Option<&[String]>,
) -> Result<Table, DataError> {
    let source = path.display().to_string();
    let format = Format::from_path(path).ok_or_else(|| {
        DataError::new(
            &source,
            DataErrorKind::Io("unknown file type: expected a .csv or .jsonl extension".into()),
        )
    })?;
    let file = std::fs::File::open(path)
        .map_err(|e| DataError::new(&source, DataErrorKind::Io(e.to_string())))?;
    let limit = opts.limits.max_bytes;
    let mut bytes = Vec::new();
    file.take(limit as u64 + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| DataError::new(&source, DataErrorKind::Io(e.to_string())))?;
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
    let err = |kind| DataError::new(source, kind);
    if bytes.len() > opts.limits.max_bytes {
        return Err(err(DataErrorKind::TooLarge {
            limit: opts.limits.max_bytes,
        }));
    }
    let text = match std::str::from_utf8(bytes) {
        Ok(t) => t,
        Err(e) => {
            let offset = e.valid_up_to();
            let line = 1 + bytes[..offset].iter().filter(|b| **b == b'\n').count();
            return Err(err(DataErrorKind::InvalidUtf8 { offset }).at_line(line));
        }
    };
    let text = text.strip_prefix('\u{FEFF}').unwrap_or(text);
    if text.trim().is_empty() {
        return Err(err(DataErrorKind::Empty));
    }
    let mut builder = Builder::new(source, opts);
    match format {
        Format::Csv => parse_csv(text, &mut builder)?,
        Format::JsonLines => parse_jsonl(text, &mut builder, opts)?,
    }
    builder.finish(schema)
}

/// Collects rows in file column order, checking ids as they come.
struct Builder<'a> {
    source: &'a str,
    opts: &'a TableOptions,
    /// Column names in file order.
    columns: Vec<String>,
    id_col: usize,
    label_col: usize,
    /// File column index of each feature, in file order.
    feature_cols: Vec<usize>,
    ids: Vec<String>,
    labels: Vec<String>,
    values: Vec<f64>,
    seen: HashMap<String, usize>,
}

impl<'a> Builder<'a> {
    fn new(source: &'a str, opts: &'a TableOptions) -> Self {
        Self {
            source,
            opts,
            columns: Vec::new(),
            id_col: 0,
            label_col: 0,
            feature_cols: Vec::new(),
            ids: Vec::new(),
            labels: Vec::new(),
            values: Vec::new(),
            seen: HashMap::new(),
        }
    }

    fn err(&self, kind: DataErrorKind) -> DataError {
        DataError::new(self.source, kind)
    }

    /// Take the header (column names in file order) at the given file line.
    fn header(&mut self, names: Vec<String>, line: usize) -> Result<(), DataError> {
        let limits = &self.opts.limits;
        if names.len() > limits.max_columns {
            return Err(self
                .err(DataErrorKind::TooManyColumns {
                    limit: limits.max_columns,
                    found: names.len(),
                })
                .at_line(line));
        }
        let mut set = HashSet::new();
        for n in &names {
            if n.is_empty() {
                return Err(self.err(DataErrorKind::EmptyColumnName).at_line(line));
            }
            if n.len() > limits.max_field_bytes {
                return Err(self
                    .err(DataErrorKind::FieldTooLong {
                        limit: limits.max_field_bytes,
                    })
                    .at_line(line));
            }
            if !set.insert(n.as_str()) {
                return Err(self
                    .err(DataErrorKind::DuplicateColumn { name: n.clone() })
                    .at_line(line)
                    .in_column(n));
            }
        }
        let find = |want: &str| names.iter().position(|n| n == want);
        let missing = |want: &str| {
            // A header made of numbers is most likely a data row: say so.
            let hint = if names.iter().any(|n| n.trim().parse::<f64>().is_ok()) {
                "; the first line looks like data: the file needs a header row".to_string()
            } else {
                format!(
                    "; the header has: {}",
                    names
                        .iter()
                        .take(12)
                        .map(|n| quote_for_message(n))
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            };
            self.err(DataErrorKind::MissingColumn {
                name: want.to_owned(),
                hint,
            })
            .at_line(line)
            .in_column(want)
        };
        let id_col = find(&self.opts.id_column).ok_or_else(|| missing(&self.opts.id_column))?;
        let label_col =
            find(&self.opts.label_column).ok_or_else(|| missing(&self.opts.label_column))?;
        if id_col == label_col {
            return Err(self
                .err(DataErrorKind::NoHeader {
                    reason: "the id and label columns must be different columns".into(),
                })
                .at_line(line));
        }
        self.id_col = id_col;
        self.label_col = label_col;
        self.feature_cols = (0..names.len())
            .filter(|&c| c != id_col && c != label_col)
            .collect();
        self.columns = names;
        Ok(())
    }

    /// Start a data row; checks the row limit.
    fn begin_row(&self, row: usize, line: usize) -> Result<(), DataError> {
        if row > self.opts.limits.max_rows {
            return Err(self
                .err(DataErrorKind::TooManyRows {
                    limit: self.opts.limits.max_rows,
                })
                .at_row(row, Some(line)));
        }
        Ok(())
    }

    /// Record the id and label of data row `row`.
    fn id_label(
        &mut self,
        row: usize,
        line: usize,
        id: String,
        label: String,
    ) -> Result<(), DataError> {
        let at = |e: DataError, col: &str| e.at_row(row, Some(line)).in_column(col);
        let id_name = self.opts.id_column.clone();
        let label_name = self.opts.label_column.clone();
        if id.trim().is_empty() {
            return Err(at(self.err(DataErrorKind::EmptyId), &id_name));
        }
        for (v, col) in [(&id, &id_name), (&label, &label_name)] {
            if v.chars().any(is_unsafe_char) {
                return Err(at(
                    self.err(DataErrorKind::ControlCharacter {
                        value: quote_for_message(v),
                    }),
                    col,
                ));
            }
        }
        if label.is_empty() {
            return Err(at(self.err(DataErrorKind::EmptyCell), &label_name));
        }
        if let Some(&first_row) = self.seen.get(&id) {
            return Err(at(
                self.err(DataErrorKind::DuplicateId {
                    id: quote_for_message(&id),
                    first_row,
                }),
                &id_name,
            ));
        }
        self.seen.insert(id.clone(), row);
        self.ids.push(id);
        self.labels.push(label);
        Ok(())
    }

    /// Check a field's length.
    fn field_len(&self, len: usize, row: usize, line: usize, col: usize) -> Result<(), DataError> {
        let limit = self.opts.limits.max_field_bytes;
        if len > limit {
            return Err(self
                .err(DataErrorKind::FieldTooLong { limit })
                .at_row(row, Some(line))
                .in_column(&self.columns[col]));
        }
        Ok(())
    }

    /// Build the table, reordering features to the schema.
    fn finish(self, schema: Option<&[String]>) -> Result<Table, DataError> {
        let file_names: Vec<String> = self
            .feature_cols
            .iter()
            .map(|&c| self.columns[c].clone())
            .collect();
        // Position of each output column among the file's feature columns.
        let order: Vec<usize> = match schema {
            None => (0..file_names.len()).collect(),
            Some(schema) => {
                let pos: HashMap<&str, usize> = file_names
                    .iter()
                    .enumerate()
                    .map(|(i, n)| (n.as_str(), i))
                    .collect();
                let wanted: HashSet<&str> = schema.iter().map(String::as_str).collect();
                if let Some(extra) = file_names.iter().find(|n| !wanted.contains(n.as_str())) {
                    return Err(self
                        .err(DataErrorKind::ExtraColumn {
                            name: extra.clone(),
                        })
                        .at_line(1)
                        .in_column(extra));
                }
                let mut order = Vec::with_capacity(schema.len());
                for name in schema {
                    match pos.get(name.as_str()) {
                        Some(&i) => order.push(i),
                        None => {
                            return Err(self
                                .err(DataErrorKind::MissingColumn {
                                    name: name.clone(),
                                    hint: " (a feature column of the trusted set)".into(),
                                })
                                .at_line(1)
                                .in_column(name))
                        }
                    }
                }
                order
            }
        };
        if order.is_empty() {
            return Err(self.err(DataErrorKind::NoFeatures).at_line(1));
        }
        if self.ids.is_empty() {
            return Err(self.err(DataErrorKind::NoRows));
        }
        let n = self.ids.len();
        let d_file = file_names.len();
        let features = Array2::from_shape_fn((n, order.len()), |(i, j)| {
            self.values[i * d_file + order[j]]
        });
        let feature_names = order.iter().map(|&i| file_names[i].clone()).collect();
        Ok(Table {
            source: self.source.to_owned(),
            ids: self.ids,
            labels: self.labels,
            feature_names,
            features,
        })
    }
}

/// Parse one numeric cell as given in a CSV file.
fn parse_number(cell: &str) -> Result<f64, DataErrorKind> {
    let t = cell.trim();
    if t.is_empty() {
        return Err(DataErrorKind::EmptyCell);
    }
    match t.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => Err(DataErrorKind::NonFinite {
            value: quote_for_message(t),
        }),
        Err(_) => Err(DataErrorKind::NotNumeric {
            value: quote_for_message(t),
        }),
    }
}

fn parse_csv(text: &str, b: &mut Builder<'_>) -> Result<(), DataError> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(text.as_bytes());
    let mut record = csv::StringRecord::new();
    let mut row = 0usize;
    let mut have_header = false;
    loop {
        let more = reader.read_record(&mut record).map_err(|e| {
            let line = e.position().map(|p| p.line() as usize);
            let mut de = b.err(DataErrorKind::Csv(e.to_string()));
            de.line = line;
            de
        })?;
        if !more {
            break;
        }
        let line = record.position().map(|p| p.line() as usize).unwrap_or(0);
        // A line holding only spaces reads as one blank field: skip it like an empty line.
        if record.len() == 1 && record[0].trim().is_empty() {
            continue;
        }
        if !have_header {
            let names = record.iter().map(|s| s.trim().to_owned()).collect();
            b.header(names, line)?;
            have_header = true;
            continue;
        }
        row += 1;
        b.begin_row(row, line)?;
        if record.len() != b.columns.len() {
            return Err(b
                .err(DataErrorKind::Ragged {
                    expected: b.columns.len(),
                    found: record.len(),
                })
                .at_row(row, Some(line)));
        }
        for (c, field) in record.iter().enumerate() {
            b.field_len(field.len(), row, line, c)?;
        }
        b.id_label(
            row,
            line,
            record[b.id_col].to_owned(),
            record[b.label_col].to_owned(),
        )?;
        for i in 0..b.feature_cols.len() {
            let c = b.feature_cols[i];
            let v = parse_number(&record[c])
                .map_err(|k| b.err(k).at_row(row, Some(line)).in_column(&b.columns[c]))?;
            b.values.push(v);
        }
    }
    if !have_header {
        return Err(b.err(DataErrorKind::Empty));
    }
    Ok(())
}

/// A JSON object as its key/value pairs in file order, so repeated keys are seen (serde_json's `Map` would
/// keep only the last).
struct Pairs(Vec<(String, serde_json::Value)>);

impl<'de> serde::Deserialize<'de> for Pairs {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> serde::de::Visitor<'de> for V {
            type Value = Pairs;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(self, mut m: A) -> Result<Pairs, A::Error> {
                let mut v = Vec::new();
                while let Some(pair) = m.next_entry::<String, serde_json::Value>()? {
                    v.push(pair);
                }
                Ok(Pairs(v))
            }
        }
        d.deserialize_map(V)
    }
}

fn json_type(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

fn parse_jsonl(text: &str, b: &mut Builder<'_>, opts: &TableOptions) -> Result<(), DataError> {
    let mut row = 0usize;
    // File column index by key; built from the first object.
    let mut index: HashMap<String, usize> = HashMap::new();
    for (line_no, raw) in text.split('\n').enumerate() {
        let line = line_no + 1;
        let raw = raw.strip_suffix('\r').unwrap_or(raw);
        if raw.trim().is_empty() {
            continue;
        }
        row += 1;
        b.begin_row(row, line)?;
        let at = |e: DataError| e.at_row(row, Some(line));
        let Pairs(pairs) = serde_json::from_str::<Pairs>(raw).map_err(|e| {
            // serde_json ends its message with " at line 1 column C" (its own line, always 1 here);
            // keep the column only, so it cannot be confused with the file line.
            let mut msg = e.to_string();
            if let Some(pos) = msg.rfind(" at line ") {
                msg.truncate(pos);
            }
            at(b.err(DataErrorKind::Json(format!(
                "{msg} (at character {} of the line)",
                e.column()
            ))))
        })?;
        if row == 1 {
            let names: Vec<String> = pairs.iter().map(|(k, _)| k.clone()).collect();
            b.header(names, line).map_err(at)?;
            index = b
                .columns
                .iter()
                .enumerate()
                .map(|(i, n)| (n.clone(), i))
                .collect();
        }
        let ncol = b.columns.len();
        let mut cells: Vec<Option<serde_json::Value>> = vec![None; ncol];
        for (k, v) in pairs {
            if k.len() > opts.limits.max_field_bytes {
                return Err(at(b.err(DataErrorKind::FieldTooLong {
                    limit: opts.limits.max_field_bytes,
                })));
            }
            let Some(&c) = index.get(&k) else {
                return Err(at(b.err(DataErrorKind::ExtraColumn { name: k.clone() })).in_column(&k));
            };
            if cells[c].is_some() {
                return Err(
                    at(b.err(DataErrorKind::DuplicateColumn { name: k.clone() })).in_column(&k),
                );
            }
            if let serde_json::Value::String(s) = &v {
                b.field_len(s.len(), row, line, c)?;
            }
            cells[c] = Some(v);
        }
        if let Some(c) = cells.iter().position(Option::is_none) {
            return Err(at(b.err(DataErrorKind::MissingColumn {
                name: b.columns[c].clone(),
                hint: " (every line needs the same keys as the first)".into(),
            }))
            .in_column(&b.columns[c]));
        }
        let cells: Vec<serde_json::Value> = cells.into_iter().flatten().collect();
        let id = match &cells[b.id_col] {
            serde_json::Value::String(s) => s.clone(),
            serde_json::Value::Number(n) if n.is_i64() || n.is_u64() => n.to_string(),
            other => {
                return Err(at(b.err(DataErrorKind::WrongType {
                    expected: "a string or an integer",
                    found: json_type(other),
                }))
                .in_column(&b.columns[b.id_col]))
            }
        };
        let label = match &cells[b.label_col] {
            serde_json::Value::String(s) => s.clone(),
            other => {
                return Err(at(b.err(DataErrorKind::WrongType {
                    expected: "a string",
                    found: json_type(other),
                }))
                .in_column(&b.columns[b.label_col]))
            }
        };
        b.id_label(row, line, id, label)?;
        for i in 0..b.feature_cols.len() {
            let c = b.feature_cols[i];
            let v = match &cells[c] {
                serde_json::Value::Number(n) => match n.as_f64() {
                    Some(v) if v.is_finite() => Ok(v),
                    _ => Err(DataErrorKind::NonFinite {
                        value: n.to_string(),
                    }),
                },
                serde_json::Value::Null => Err(DataErrorKind::EmptyCell),
                other => Err(DataErrorKind::WrongType {
                    expected: "a JSON number",
                    found: json_type(other),
                }),
            }
            .map_err(|k| at(b.err(k)).in_column(&b.columns[c]))?;
            b.values.push(v);
        }
    }
    if row == 0 {
        return Err(b.err(DataErrorKind::Empty));
    }
    Ok(())
}

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

#[cfg(test)]
mod tests {
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
        let t = csv("\u{FEFF}id,label,a,b\n\"x,1\",pet, 1.5 ,2\n\ny2,glass,-3e2,0\n").unwrap();
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
        let e = parse_table(
            b"id,label,a\nx,p,1\n\xff\n",
            Format::Csv,
            "b.csv",
            &TableOptions::default(),
            None,
        )
        .unwrap_err();
        assert_eq!(
            (*e.kind, e.line),
            (DataErrorKind::InvalidUtf8 { offset: 17 }, Some(3))
        );
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
    fn json_ids_may_be_integers_and_nesting_is_limited() {
        let t = jsonl("{\"id\":17,\"label\":\"p\",\"a\":1}\r\n").unwrap();
        assert_eq!(t.ids, vec!["17"]);
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
    fn table_strategy(
    ) -> impl Strategy<Value = (Vec<String>, Vec<String>, Vec<String>, Vec<Vec<f64>>)> {
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
                        prop_assert!(!e.to_string().is_empty());
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
            for (bytes, f) in [(c, Format::Csv), (j, Format::JsonLines)] {
                let t = parse_table(&bytes, f, "rt", &TableOptions::default(), None)
                    .map_err(|e| TestCaseError::fail(format!("{e}\n{}", String::from_utf8_lossy(&bytes))))?;
                prop_assert_eq!(&t.ids, &ids);
                prop_assert_eq!(&t.labels, &labels);
                prop_assert_eq!(&t.feature_names, &names);
                match f {
                    // Bit-exact: the writer's number text parses back to the same f64.
                    Format::Csv => prop_assert_eq!(&t.features, &x),
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
}
