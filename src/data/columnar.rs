//! Apache Parquet: reading flat Parquet files into the table builder, and writing tables and feature
//! tables as Parquet.
//!
//! Only flat schemas are read: one primitive column per field, no groups, lists or maps. The id and
//! label columns are UTF-8 strings (`BYTE_ARRAY`, normally with the `STRING` annotation); feature columns
//! are `FLOAT` (32-bit) or `DOUBLE` (64-bit). A column may be declared `OPTIONAL`, but a null value in it
//! is an error that names the row and the column, as an empty CSV cell is. Any other column type is an
//! error naming the column and the type found. Pages compressed with Snappy (the default of most writers)
//! or not compressed are read; other codecs are reported as such.
//!
//! The writers produce one row group, Snappy-compressed, with `REQUIRED` columns: `BYTE_ARRAY (STRING)`
//! for the id and label, `FLOAT` or `DOUBLE` for features.

use std::sync::Arc;

use ndarray::ArrayView2;
use parquet::basic::{Compression, LogicalType, Repetition, Type as PhysicalType};
use parquet::data_type::{ByteArray, ByteArrayType, DoubleType, FloatType};
use parquet::file::properties::WriterProperties;
use parquet::file::reader::{FileReader, SerializedFileReader};
use parquet::file::writer::SerializedFileWriter;
use parquet::record::Field;
use parquet::schema::types::Type;

use super::parse::Builder;
use super::{DataError, DataErrorKind};

/// The name of a Parquet physical type, for messages.
fn physical_name(t: PhysicalType) -> &'static str {
    match t {
        PhysicalType::BOOLEAN => "BOOLEAN",
        PhysicalType::INT32 => "INT32",
        PhysicalType::INT64 => "INT64",
        PhysicalType::INT96 => "INT96",
        PhysicalType::FLOAT => "FLOAT",
        PhysicalType::DOUBLE => "DOUBLE",
        PhysicalType::BYTE_ARRAY => "BYTE_ARRAY",
        PhysicalType::FIXED_LEN_BYTE_ARRAY => "FIXED_LEN_BYTE_ARRAY",
    }
}

/// What a decoded value is, for messages.
fn field_name(f: &Field) -> &'static str {
    match f {
        Field::Null => "null",
        Field::Bool(_) => "a boolean",
        Field::Float(_) | Field::Double(_) | Field::Float16(_) | Field::Decimal(_) => "a float",
        Field::Str(_) | Field::Bytes(_) => "a string",
        Field::Group(_) | Field::ListInternal(_) | Field::MapInternal(_) => "a nested value",
        _ => "an integer or a date",
    }
}

/// Read a Parquet file's columns into the builder: the header from the schema, then every row.
/// Errors carry the data row (1-based) and the column; there are no file lines.
pub(super) fn read_parquet(bytes: &[u8], b: &mut Builder<'_>) -> Result<(), DataError> {
    let malformed = |b: &Builder<'_>, e: parquet::errors::ParquetError| {
        b.err(DataErrorKind::Parquet(e.to_string()))
    };
    let reader = SerializedFileReader::new(bytes::Bytes::copy_from_slice(bytes))
        .map_err(|e| malformed(b, e))?;
    let schema = reader.metadata().file_metadata().schema_descr_ptr();
    let fields = schema.root_schema().get_fields();
    for f in fields {
        if !f.is_primitive() {
            return Err(b
                .err(DataErrorKind::WrongType {
                    expected: "a flat column",
                    found: "a nested group",
                })
                .in_column(f.name()));
        }
    }
    let names: Vec<String> = fields.iter().map(|f| f.name().to_owned()).collect();
    b.header(names, 0)?;
    for (c, col) in schema.columns().iter().enumerate() {
        let text_column = c == b.id_col || (b.shape.label && c == b.label_col);
        let t = col.physical_type();
        let (ok, expected) = if text_column {
            (
                t == PhysicalType::BYTE_ARRAY,
                "a string column (BYTE_ARRAY, STRING)",
            )
        } else {
            (
                matches!(t, PhysicalType::FLOAT | PhysicalType::DOUBLE),
                "a FLOAT or DOUBLE column",
            )
        };
        if !ok {
            return Err(b
                .err(DataErrorKind::WrongType {
                    expected,
                    found: physical_name(t),
                })
                .in_column(&b.columns[c]));
        }
    }
    let rows = reader.get_row_iter(None).map_err(|e| malformed(b, e))?;
    let mut row = 0usize;
    for r in rows {
        row += 1;
        let r = r.map_err(|e| malformed(b, e).at_row(row, None))?;
        b.begin_row(row, 0)?;
        let cells: Vec<&Field> = r.get_column_iter().map(|(_, f)| f).collect();
        let text = |b: &Builder<'_>, c: usize| -> Result<String, DataError> {
            let at = |e: DataError| e.at_row(row, None).in_column(&b.columns[c]);
            let s = match cells[c] {
                Field::Str(s) => s.clone(),
                Field::Bytes(v) => std::str::from_utf8(v.data())
                    .map_err(|_| at(b.err(DataErrorKind::InvalidUtf8)))?
                    .to_owned(),
                Field::Null => return Err(at(b.err(DataErrorKind::EmptyCell))),
                other => {
                    return Err(at(b.err(DataErrorKind::WrongType {
                        expected: "a string",
                        found: field_name(other),
                    })))
                }
            };
            b.field_len(s.len(), row, 0, c)?;
            Ok(s)
        };
        let id = text(b, b.id_col)?;
        let label = if b.shape.label {
            text(b, b.label_col)?
        } else {
            String::new()
        };
        b.id_label(row, 0, id, label)?;
        for i in 0..b.feature_cols.len() {
            let c = b.feature_cols[i];
            let v = match cells[c] {
                Field::Float(v) => Ok(f64::from(*v)),
                Field::Double(v) => Ok(*v),
                Field::Null => Err(DataErrorKind::EmptyCell),
                other => Err(DataErrorKind::WrongType {
                    expected: "a float",
                    found: field_name(other),
                }),
            }
            .and_then(|v| {
                if v.is_finite() {
                    Ok(v)
                } else {
                    Err(DataErrorKind::NonFinite {
                        value: v.to_string(),
                    })
                }
            })
            .map_err(|k| b.err(k).at_row(row, None).in_column(&b.columns[c]))?;
            b.values.push(v);
        }
    }
    if row == 0 && b.columns.is_empty() {
        return Err(b.err(DataErrorKind::Empty));
    }
    Ok(())
}

/// One column to write.
enum Column<'a> {
    Text(&'a [String]),
    F32(Vec<f32>),
    F64(Vec<f64>),
}

fn to_io(e: parquet::errors::ParquetError) -> std::io::Error {
    std::io::Error::other(e.to_string())
}

fn write_columns<W: std::io::Write + Send>(
    out: W,
    columns: Vec<(&str, Column<'_>)>,
) -> std::io::Result<()> {
    let mut fields = Vec::with_capacity(columns.len());
    for (name, col) in &columns {
        let builder = match col {
            Column::Text(_) => Type::primitive_type_builder(name, PhysicalType::BYTE_ARRAY)
                .with_logical_type(Some(LogicalType::String)),
            Column::F32(_) => Type::primitive_type_builder(name, PhysicalType::FLOAT),
            Column::F64(_) => Type::primitive_type_builder(name, PhysicalType::DOUBLE),
        };
        fields.push(Arc::new(
            builder
                .with_repetition(Repetition::REQUIRED)
                .build()
                .map_err(to_io)?,
        ));
    }
    let schema = Type::group_type_builder("schema")
        .with_fields(fields)
        .build()
        .map_err(to_io)?;
    let props = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .build();
    let mut writer =
        SerializedFileWriter::new(out, Arc::new(schema), Arc::new(props)).map_err(to_io)?;
    let mut group = writer.next_row_group().map_err(to_io)?;
    for (_, col) in &columns {
        let Some(mut w) = group.next_column().map_err(to_io)? else {
            break;
        };
        match col {
            Column::Text(v) => {
                let v: Vec<ByteArray> = v.iter().map(|s| ByteArray::from(s.as_str())).collect();
                w.typed::<ByteArrayType>()
                    .write_batch(&v, None, None)
                    .map_err(to_io)?;
            }
            Column::F32(v) => {
                w.typed::<FloatType>()
                    .write_batch(v, None, None)
                    .map_err(to_io)?;
            }
            Column::F64(v) => {
                w.typed::<DoubleType>()
                    .write_batch(v, None, None)
                    .map_err(to_io)?;
            }
        }
        w.close().map_err(to_io)?;
    }
    group.close().map_err(to_io)?;
    writer.close().map_err(to_io)?;
    Ok(())
}

fn shape_error(msg: String) -> std::io::Error {
    std::io::Error::new(std::io::ErrorKind::InvalidInput, msg)
}

/// Write a labeled table as Parquet: the id and label as strings, the features as `FLOAT` when
/// `float32` (values rounded to the nearest `f32`) or `DOUBLE`.
pub fn write_parquet<W: std::io::Write + Send>(
    out: W,
    (id_column, label_column): (&str, &str),
    ids: &[String],
    labels: &[String],
    names: &[String],
    x: ArrayView2<'_, f64>,
    float32: bool,
) -> std::io::Result<()> {
    if ids.len() != x.nrows() || labels.len() != x.nrows() || names.len() != x.ncols() {
        return Err(shape_error(format!(
            "shape mismatch: {} ids, {} labels, {} names for a {}×{} feature matrix",
            ids.len(),
            labels.len(),
            names.len(),
            x.nrows(),
            x.ncols()
        )));
    }
    let mut columns = vec![
        (id_column, Column::Text(ids)),
        (label_column, Column::Text(labels)),
    ];
    for (j, name) in names.iter().enumerate() {
        let col = x.column(j);
        columns.push((
            name.as_str(),
            if float32 {
                Column::F32(col.iter().map(|v| *v as f32).collect())
            } else {
                Column::F64(col.to_vec())
            },
        ));
    }
    write_columns(out, columns)
}

/// Write a feature table as Parquet: the id as a string and every feature as `FLOAT`. `values` is
/// row-major, `ids.len() × names.len()`.
pub fn write_parquet_features<W: std::io::Write + Send>(
    out: W,
    id_column: &str,
    ids: &[String],
    names: &[String],
    values: &[f32],
) -> std::io::Result<()> {
    let d = names.len();
    if values.len() != ids.len() * d {
        return Err(shape_error(format!(
            "shape mismatch: {} values for {} ids × {} features",
            values.len(),
            ids.len(),
            d
        )));
    }
    let mut columns = vec![(id_column, Column::Text(ids))];
    for (j, name) in names.iter().enumerate() {
        columns.push((
            name.as_str(),
            Column::F32(values.iter().skip(j).step_by(d.max(1)).copied().collect()),
        ));
    }
    write_columns(out, columns)
}
