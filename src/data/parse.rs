//! The readers: a table builder that checks the header, ids, labels and values as they come, and the two
//! formats (CSV, JSON Lines) feeding it.

use std::collections::{HashMap, HashSet};
use std::fmt;

use ndarray::Array2;

use crate::text::{is_unsafe_char, quote_for_message};

use super::{DataError, DataErrorKind, Table, TableOptions};

/// Which columns a file must have besides the id: a label column, feature columns, or both.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) struct Shape {
    /// A label column is required (vendor batches, trusted sets, pools); without it the file is a
    /// feature table.
    pub label: bool,
    /// Feature columns are required; without them the file is `id,label` only (a delivery in
    /// by-reference mode) and any other column is refused.
    pub features: bool,
}

impl Shape {
    /// A labeled table with features.
    pub const LABELED: Shape = Shape {
        label: true,
        features: true,
    };
    /// `id,label` only.
    pub const LABELS_ONLY: Shape = Shape {
        label: true,
        features: false,
    };
    /// `id` and features (a feature table).
    pub const FEATURES_ONLY: Shape = Shape {
        label: false,
        features: true,
    };
}

/// Collects rows in file column order, checking ids as they come.
/// When a CSV header came out as one column that holds a semicolon, a tab or a vertical bar, the file
/// was most likely written with that delimiter (a spreadsheet's export in many locales uses `;`): the
/// delimiter's name, for a hint in the error.
fn other_delimiter(names: &[String]) -> Option<&'static str> {
    let [only] = names else { return None };
    [(';', "semicolon"), ('\t', "tab"), ('|', "vertical-bar")]
        .into_iter()
        .find(|(c, _)| only.contains(*c))
        .map(|(_, name)| name)
}

pub(super) struct Builder<'a> {
    source: &'a str,
    opts: &'a TableOptions,
    pub(super) shape: Shape,
    /// Column names in file order.
    pub(super) columns: Vec<String>,
    pub(super) id_col: usize,
    pub(super) label_col: usize,
    /// File column index of each feature, in file order.
    pub(super) feature_cols: Vec<usize>,
    ids: Vec<String>,
    labels: Vec<String>,
    pub(super) values: Vec<f64>,
    seen: HashMap<String, usize>,
}

impl<'a> Builder<'a> {
    pub(super) fn new(source: &'a str, opts: &'a TableOptions, shape: Shape) -> Self {
        Self {
            source,
            opts,
            shape,
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

    pub(super) fn err(&self, kind: DataErrorKind) -> DataError {
        DataError::new(self.source, kind)
    }

    /// Take the header (column names in file order) at the given file line.
    pub(super) fn header(&mut self, names: Vec<String>, line: usize) -> Result<(), DataError> {
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
            let hint = if let Some(kind) = other_delimiter(&names) {
                format!(
                    "; the header looks {kind}-separated; labelweir reads comma-separated files"
                )
            } else if names.iter().any(|n| n.trim().parse::<f64>().is_ok()) {
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
        // Without a label column (a feature table), `label_col` points at the id column and is never read.
        let label_col = if self.shape.label {
            find(&self.opts.label_column).ok_or_else(|| missing(&self.opts.label_column))?
        } else {
            id_col
        };
        if self.shape.label && id_col == label_col {
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
        if !self.shape.features {
            if let Some(&c) = self.feature_cols.first() {
                return Err(self
                    .err(DataErrorKind::FeaturesNotAccepted {
                        name: names[c].clone(),
                    })
                    .at_line(line)
                    .in_column(&names[c]));
            }
        }
        self.columns = names;
        Ok(())
    }

    /// Start a data row; checks the row limit.
    pub(super) fn begin_row(&self, row: usize, line: usize) -> Result<(), DataError> {
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
    pub(super) fn id_label(
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
        let checked: &[(&String, &String)] = if self.shape.label {
            &[(&id, &id_name), (&label, &label_name)]
        } else {
            &[(&id, &id_name)]
        };
        for &(v, col) in checked {
            if v.chars().any(is_unsafe_char) {
                return Err(at(
                    self.err(DataErrorKind::ControlCharacter {
                        value: quote_for_message(v),
                    }),
                    col,
                ));
            }
        }
        if self.shape.label && label.is_empty() {
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
        if self.shape.label {
            self.labels.push(label);
        }
        Ok(())
    }

    /// Check a field's length.
    pub(super) fn field_len(
        &self,
        len: usize,
        row: usize,
        line: usize,
        col: usize,
    ) -> Result<(), DataError> {
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
    pub(super) fn finish(self, schema: Option<&[String]>) -> Result<Table, DataError> {
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
        if order.is_empty() && self.shape.features {
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

/// Parse one numeric cell as given in a CSV file: the plain decimal or exponent form, an optional leading
/// `-`, nothing around it. Spaces around the number and a leading `+` are refused (they are what an export
/// with padded columns or a locale's formatting leaves, and accepting them would let two spellings of a
/// file hash differently yet read the same).
pub(super) fn parse_number(cell: &str) -> Result<f64, DataErrorKind> {
    if cell.trim().is_empty() {
        return Err(DataErrorKind::EmptyCell);
    }
    let t = cell;
    if t.trim() != t {
        return Err(DataErrorKind::NumberFormat {
            value: quote_for_message(t),
            reason: "spaces around the number",
        });
    }
    if t.starts_with('+') {
        return Err(DataErrorKind::NumberFormat {
            value: quote_for_message(t),
            reason: "a leading plus sign",
        });
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

/// File lines of byte positions, counted forward from the last position asked (positions only grow).
///
/// The record reader's own line count is one too low after a CRLF line ending (it ends the record at the
/// CR and counts the LF into the next one), so lines are counted here from byte offsets: a record's line
/// is one plus the line feeds before its first byte, skipping the CR or LF that ended the previous record.
#[derive(Default)]
struct LineCounter {
    pos: usize,
    line: usize,
}

impl LineCounter {
    fn line_at(&mut self, text: &str, byte: usize) -> usize {
        let b = text.as_bytes();
        let mut at = byte.min(b.len());
        while at < b.len() && (b[at] == b'\r' || b[at] == b'\n') {
            at += 1;
        }
        if at < self.pos {
            self.pos = 0;
            self.line = 0;
        }
        self.line += b[self.pos..at].iter().filter(|c| **c == b'\n').count();
        self.pos = at;
        self.line + 1
    }
}

pub(super) fn parse_csv(text: &str, b: &mut Builder<'_>) -> Result<(), DataError> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(text.as_bytes());
    let mut record = csv::StringRecord::new();
    let mut row = 0usize;
    let mut have_header = false;
    let mut lines = LineCounter::default();
    loop {
        let more = reader.read_record(&mut record).map_err(|e| {
            let line = e.position().map(|p| lines.line_at(text, p.byte() as usize));
            let mut de = b.err(DataErrorKind::Csv(e.to_string()));
            de.line = line;
            de
        })?;
        if !more {
            break;
        }
        let line = record
            .position()
            .map(|p| lines.line_at(text, p.byte() as usize))
            .unwrap_or(0);
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
        let label = if b.shape.label {
            record[b.label_col].to_owned()
        } else {
            String::new()
        };
        b.id_label(row, line, record[b.id_col].to_owned(), label)?;
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
pub(super) struct Pairs(Vec<(String, serde_json::Value)>);

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

pub(super) fn json_type(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

pub(super) fn parse_jsonl(
    text: &str,
    b: &mut Builder<'_>,
    opts: &TableOptions,
) -> Result<(), DataError> {
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
        // Ids are JSON strings only: a number id (`17`) has many spellings (`17.0`, `1.7e1`) and loses
        // leading zeros, so two files could name one item differently.
        let id = match &cells[b.id_col] {
            serde_json::Value::String(s) => s.clone(),
            other => {
                return Err(at(b.err(DataErrorKind::WrongType {
                    expected: "a JSON string (write the id in quotes)",
                    found: json_type(other),
                }))
                .in_column(&b.columns[b.id_col]))
            }
        };
        let label = match &cells[b.label_col] {
            _ if !b.shape.label => String::new(),
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

/// Where the first invalid UTF-8 byte (at byte `offset`) is, as a data row and column: the file is read
/// again as raw records (CSV: the same record reader on bytes; JSON Lines: the line, decoded with
/// replacement characters, and the first key or string value that holds one).
pub(super) fn locate_invalid_utf8(
    bytes: &[u8],
    offset: usize,
    format: super::Format,
    b: &Builder<'_>,
) -> DataError {
    let err = b.err(DataErrorKind::InvalidUtf8);
    let bytes = bytes.strip_prefix("\u{FEFF}".as_bytes()).unwrap_or(bytes);
    match format {
        super::Format::Csv => locate_in_csv(bytes, err),
        _ => {
            let line_no = 1 + bytes[..offset.min(bytes.len())]
                .iter()
                .filter(|c| **c == b'\n')
                .count();
            let lines: Vec<&[u8]> = bytes.split(|c| *c == b'\n').collect();
            let row = lines[..line_no.min(lines.len())]
                .iter()
                .filter(|l| !String::from_utf8_lossy(l).trim().is_empty())
                .count();
            let text = String::from_utf8_lossy(lines.get(line_no - 1).copied().unwrap_or(&[]));
            let column = serde_json::from_str::<Pairs>(&text)
                .ok()
                .and_then(|Pairs(p)| {
                    p.into_iter()
                    .find(|(k, v)| {
                        k.contains('\u{FFFD}')
                            || matches!(v, serde_json::Value::String(s) if s.contains('\u{FFFD}'))
                    })
                    .map(|(k, _)| k)
                });
            let e = err.at_row(row.max(1), Some(line_no));
            match column {
                Some(c) => e.in_column(&c),
                None => e,
            }
        }
    }
}

fn locate_in_csv(bytes: &[u8], err: DataError) -> DataError {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(bytes);
    let mut record = csv::ByteRecord::new();
    let mut header: Option<Vec<String>> = None;
    let mut row = 0usize;
    while let Ok(true) = reader.read_byte_record(&mut record) {
        let line = record.position().map(|p| p.line() as usize).unwrap_or(0);
        if record.len() == 1 && record[0].iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        let bad = record.iter().position(|f| std::str::from_utf8(f).is_err());
        match (&header, bad) {
            (None, Some(c)) => {
                return err
                    .at_line(line)
                    .in_column(&format!("header cell {}", c + 1))
            }
            (None, None) => {
                header = Some(
                    record
                        .iter()
                        .map(|f| String::from_utf8_lossy(f).trim().to_owned())
                        .collect(),
                );
            }
            (Some(names), bad) => {
                row += 1;
                if let Some(c) = bad {
                    let name = names
                        .get(c)
                        .cloned()
                        .unwrap_or_else(|| format!("cell {}", c + 1));
                    return err.at_row(row, Some(line)).in_column(&name);
                }
            }
        }
    }
    err
}
