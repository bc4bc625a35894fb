//! Shard files: Parquet files of rows with a few flat columns, written in row groups and
//! read back whole, with key/value metadata naming what made them.
//!
//! Every column has exactly one leaf (text, 64-bit integer, or a list of text or of 32-bit
//! floats), so rows are written with the low-level column API and read with the record API.
//! A BLAKE3 checksum over every row's values goes into the metadata, so a file damaged
//! inside (not only cut short, which loses its footer) is refused too.

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use parquet::data_type::{ByteArray, ByteArrayType, FloatType, Int64Type};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use parquet::file::reader::{FileReader, SerializedFileReader};
use parquet::file::writer::SerializedFileWriter;
use parquet::record::{Field, Row};
use parquet::schema::parser::parse_message_type;
use parquet::schema::types::Type;

use crate::IndexError;

/// Metadata key: number of rows, checked on reading.
const ROWS_KEY: &str = "tagweave.rows";
/// Metadata key: BLAKE3 over every row's values, checked on reading.
const CHECKSUM_KEY: &str = "tagweave.checksum";

/// What one column holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Column {
    Text,
    /// Text that is a JSON document.
    Json,
    Int,
    TextList,
    FloatList,
}

/// One cell.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Value {
    Text(String),
    Int(i64),
    TextList(Vec<String>),
    FloatList(Vec<f32>),
}

/// The columns of one kind of shard file, in order.
pub(crate) type Layout = &'static [(&'static str, Column)];

fn schema(name: &str, layout: Layout) -> Result<Type, String> {
    let fields: Vec<String> = layout
        .iter()
        .map(|(column, kind)| match kind {
            Column::Text => format!("REQUIRED BYTE_ARRAY {column} (UTF8);"),
            Column::Json => format!("REQUIRED BYTE_ARRAY {column} (JSON);"),
            Column::Int => format!("REQUIRED INT64 {column};"),
            Column::TextList => format!(
                "REQUIRED group {column} (LIST) {{ REPEATED group list {{ \
                 REQUIRED BYTE_ARRAY element (UTF8); }} }}"
            ),
            Column::FloatList => format!(
                "REQUIRED group {column} (LIST) {{ REPEATED group list {{ \
                 REQUIRED FLOAT element; }} }}"
            ),
        })
        .collect();
    parse_message_type(&format!("message {name} {{ {} }}", fields.join(" ")))
        .map_err(|e| e.to_string())
}

/// Adds one row's values to the checksum, each with its kind and length first.
fn hash_row(hasher: &mut blake3::Hasher, row: &[Value]) {
    for value in row {
        match value {
            Value::Text(text) => {
                hasher.update(&[0]);
                hash_bytes(hasher, text.as_bytes());
            }
            Value::Int(n) => {
                hasher.update(&[1]);
                hasher.update(&n.to_le_bytes());
            }
            Value::TextList(texts) => {
                hasher.update(&[2]);
                hasher.update(&(texts.len() as u64).to_le_bytes());
                texts.iter().for_each(|t| hash_bytes(hasher, t.as_bytes()));
            }
            Value::FloatList(floats) => {
                hasher.update(&[3]);
                hasher.update(&(floats.len() as u64).to_le_bytes());
                floats.iter().for_each(|f| {
                    hasher.update(&f.to_le_bytes());
                });
            }
        }
    }
}

fn hash_bytes(hasher: &mut blake3::Hasher, bytes: &[u8]) {
    hasher.update(&(bytes.len() as u64).to_le_bytes());
    hasher.update(bytes);
}

/// Writes a shard file in row groups. The rows go to a hidden file beside the target, which
/// takes the target's name only when `finish` has written the footer: a worker that dies
/// mid-write leaves no file under the final name.
pub(crate) struct ShardWriter {
    target: PathBuf,
    partial: PathBuf,
    layout: Layout,
    writer: Option<SerializedFileWriter<File>>,
    hasher: blake3::Hasher,
    rows: u64,
}

impl ShardWriter {
    pub(crate) fn create(
        target: &Path,
        schema_name: &str,
        layout: Layout,
        metadata: Vec<(String, String)>,
    ) -> Result<ShardWriter, IndexError> {
        let name = target
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        // The process id keeps two runs of the same part (a task an engine started again
        // while the first still ran) from writing into one file.
        let partial = target.with_file_name(format!(".{name}.{}.partial", std::process::id()));
        let file = File::create(&partial).map_err(|source| IndexError::Io {
            path: partial.clone(),
            source,
        })?;
        let bad = |problem: String| IndexError::ShardFile {
            path: target.to_path_buf(),
            problem,
        };
        let schema = Arc::new(schema(schema_name, layout).map_err(bad)?);
        let properties = Arc::new(
            WriterProperties::builder()
                .set_key_value_metadata(Some(
                    metadata
                        .into_iter()
                        .map(|(k, v)| KeyValue::new(k, v))
                        .collect(),
                ))
                .build(),
        );
        let writer =
            SerializedFileWriter::new(file, schema, properties).map_err(|e| bad(e.to_string()))?;
        Ok(ShardWriter {
            target: target.to_path_buf(),
            partial,
            layout,
            writer: Some(writer),
            hasher: blake3::Hasher::new(),
            rows: 0,
        })
    }

    fn error(&self, error: impl ToString) -> IndexError {
        IndexError::ShardFile {
            path: self.target.clone(),
            problem: error.to_string(),
        }
    }

    /// Writes one row group; every row has one value per column, of the column's kind.
    pub(crate) fn write_group(&mut self, rows: &[Vec<Value>]) -> Result<(), IndexError> {
        if rows.is_empty() {
            return Ok(());
        }
        for row in rows {
            hash_row(&mut self.hasher, row);
        }
        let layout = self.layout;
        let written = match self.writer.as_mut() {
            Some(writer) => write_columns(writer, layout, rows),
            None => Err("already finished".to_string()),
        };
        written.map_err(|e| self.error(e))?;
        self.rows += rows.len() as u64;
        Ok(())
    }

    /// Writes the footer (with the row count and checksum), flushes, and gives the file its
    /// final name.
    pub(crate) fn finish(mut self) -> Result<u64, IndexError> {
        let Some(mut writer) = self.writer.take() else {
            return Err(self.error("already finished"));
        };
        writer.append_key_value_metadata(KeyValue::new(ROWS_KEY.into(), self.rows.to_string()));
        writer.append_key_value_metadata(KeyValue::new(
            CHECKSUM_KEY.into(),
            self.hasher.finalize().to_hex().to_string(),
        ));
        let file = writer.into_inner().map_err(|e| self.error(e))?;
        file.sync_all().map_err(|source| IndexError::Io {
            path: self.partial.clone(),
            source,
        })?;
        std::fs::rename(&self.partial, &self.target).map_err(|source| IndexError::Io {
            path: self.target.clone(),
            source,
        })?;
        Ok(self.rows)
    }
}

impl Drop for ShardWriter {
    fn drop(&mut self) {
        if self.writer.is_some() {
            // Not finished (an error on the way): leave nothing half-written behind.
            let _ = std::fs::remove_file(&self.partial);
        }
    }
}

/// Writes one row group of `rows` (one value per column, of the column's kind).
fn write_columns(
    writer: &mut SerializedFileWriter<File>,
    layout: Layout,
    rows: &[Vec<Value>],
) -> Result<(), String> {
    let mut group = writer.next_row_group().map_err(|e| e.to_string())?;
    for (index, (_, kind)) in layout.iter().enumerate() {
        let mut column = group
            .next_column()
            .map_err(|e| e.to_string())?
            .ok_or("fewer columns than the layout")?;
        let cells = rows.iter().map(|row| &row[index]);
        let written = match kind {
            Column::Text | Column::Json => {
                let values: Vec<ByteArray> = cells
                    .map(|cell| match cell {
                        Value::Text(t) => ByteArray::from(t.as_str()),
                        _ => ByteArray::from(""),
                    })
                    .collect();
                column
                    .typed::<ByteArrayType>()
                    .write_batch(&values, None, None)
            }
            Column::Int => {
                let values: Vec<i64> = cells
                    .map(|cell| match cell {
                        Value::Int(n) => *n,
                        _ => 0,
                    })
                    .collect();
                column.typed::<Int64Type>().write_batch(&values, None, None)
            }
            Column::TextList => {
                let lists: Vec<&[String]> = cells
                    .map(|cell| match cell {
                        Value::TextList(t) => t.as_slice(),
                        _ => &[],
                    })
                    .collect();
                let values: Vec<ByteArray> = lists
                    .iter()
                    .flat_map(|l| l.iter().map(|t| ByteArray::from(t.as_str())))
                    .collect();
                write_lists::<ByteArrayType>(&mut column, lists.iter().map(|l| l.len()), &values)
            }
            Column::FloatList => {
                let lists: Vec<&[f32]> = cells
                    .map(|cell| match cell {
                        Value::FloatList(f) => f.as_slice(),
                        _ => &[],
                    })
                    .collect();
                write_lists::<FloatType>(
                    &mut column,
                    lists.iter().map(|l| l.len()),
                    &lists.concat(),
                )
            }
        };
        written.map_err(|e| e.to_string())?;
        column.close().map_err(|e| e.to_string())?;
    }
    group.close().map_err(|e| e.to_string())?;
    Ok(())
}

/// Writes the values of lists of these lengths, one after another, as one column.
fn write_lists<T: parquet::data_type::DataType>(
    column: &mut parquet::file::writer::SerializedColumnWriter<'_>,
    lengths: impl Iterator<Item = usize>,
    values: &[T::T],
) -> parquet::errors::Result<usize> {
    let (definition, repetition) = list_levels(lengths);
    column
        .typed::<T>()
        .write_batch(values, Some(&definition), Some(&repetition))
}

/// Definition and repetition levels of required lists of these lengths (a list's
/// elements are required, so an empty list is the only absent level).
fn list_levels(lengths: impl Iterator<Item = usize>) -> (Vec<i16>, Vec<i16>) {
    let mut definition = Vec::new();
    let mut repetition = Vec::new();
    for length in lengths {
        if length == 0 {
            definition.push(0);
            repetition.push(0);
        } else {
            definition.extend(std::iter::repeat_n(1, length));
            repetition.push(0);
            repetition.extend(std::iter::repeat_n(1, length - 1));
        }
    }
    (definition, repetition)
}

/// An opened shard file: its metadata, read and checked against the expected layout.
pub(crate) struct ShardReader {
    path: PathBuf,
    layout: Layout,
    reader: SerializedFileReader<File>,
    metadata: Vec<(String, String)>,
}

impl ShardReader {
    /// Opens a shard file and reads its metadata; its columns are checked by
    /// [`ShardReader::expect`] before any row is read.
    pub(crate) fn open(path: &Path) -> Result<ShardReader, IndexError> {
        let file = File::open(path).map_err(|source| IndexError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let reader = SerializedFileReader::new(file).map_err(|e| IndexError::ShardFile {
            path: path.to_path_buf(),
            problem: format!(
                "not a complete Parquet file ({e}); it was probably cut short: make it again"
            ),
        })?;
        let metadata: Vec<(String, String)> = reader
            .metadata()
            .file_metadata()
            .key_value_metadata()
            .map(|pairs| {
                pairs
                    .iter()
                    .map(|kv| (kv.key.clone(), kv.value.clone().unwrap_or_default()))
                    .collect()
            })
            .unwrap_or_default();
        Ok(ShardReader {
            path: path.to_path_buf(),
            layout: &[],
            reader,
            metadata,
        })
    }

    /// Checks that the file's columns are exactly `layout`'s.
    pub(crate) fn expect(
        mut self,
        schema_name: &str,
        layout: Layout,
    ) -> Result<ShardReader, IndexError> {
        let expected = schema(schema_name, layout).map_err(|e| self.error(e))?;
        if self.reader.metadata().file_metadata().schema() != &expected {
            return Err(self.error(format!(
                "its columns are not those of a {schema_name} file of this tagweave"
            )));
        }
        self.layout = layout;
        Ok(self)
    }

    /// A metadata value by key.
    pub(crate) fn meta(&self, key: &str) -> Option<&str> {
        self.metadata
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.as_str())
    }

    fn error(&self, problem: impl Into<String>) -> IndexError {
        IndexError::ShardFile {
            path: self.path.clone(),
            problem: problem.into(),
        }
    }

    /// Reads every row in order, giving them to `each` in groups of at most `group` rows,
    /// and checks the row count and checksum at the end. With `each` doing nothing this
    /// is the whole-file check made before anything of the file is used.
    pub(crate) fn rows(
        &self,
        group: usize,
        each: &mut dyn FnMut(Vec<Vec<Value>>) -> Result<(), IndexError>,
    ) -> Result<(), IndexError> {
        let expected_rows: u64 = self
            .meta(ROWS_KEY)
            .and_then(|v| v.parse().ok())
            .ok_or_else(|| self.error(format!("no `{ROWS_KEY}` in its metadata")))?;
        let expected_sum = self
            .meta(CHECKSUM_KEY)
            .ok_or_else(|| self.error(format!("no `{CHECKSUM_KEY}` in its metadata")))?
            .to_string();
        let mut hasher = blake3::Hasher::new();
        let mut count = 0u64;
        let mut pending = Vec::with_capacity(group);
        let rows = self
            .reader
            .get_row_iter(None)
            .map_err(|e| self.error(format!("cannot be read ({e})")))?;
        for row in rows {
            let row = row.map_err(|e| self.error(format!("damaged ({e})")))?;
            let values = self.values(&row)?;
            hash_row(&mut hasher, &values);
            count += 1;
            pending.push(values);
            if pending.len() == group {
                each(std::mem::take(&mut pending))?;
            }
        }
        if count != expected_rows || hasher.finalize().to_hex().as_str() != expected_sum {
            return Err(self.error(format!(
                "damaged: {count} rows read, {expected_rows} written, or their checksum \
                 differs; make it again"
            )));
        }
        if !pending.is_empty() {
            each(pending)?;
        }
        Ok(())
    }

    fn values(&self, row: &Row) -> Result<Vec<Value>, IndexError> {
        let fields: Vec<&Field> = row.get_column_iter().map(|(_, field)| field).collect();
        if fields.len() != self.layout.len() {
            return Err(self.error("a row with another number of columns"));
        }
        fields
            .iter()
            .zip(self.layout)
            .map(|(field, (name, kind))| {
                let wrong = || self.error(format!("column `{name}` holds a value of another type"));
                Ok(match (kind, field) {
                    (Column::Text | Column::Json, Field::Str(text)) => Value::Text(text.clone()),
                    (Column::Int, Field::Long(n)) => Value::Int(*n),
                    (Column::TextList, Field::ListInternal(list)) => Value::TextList(
                        list.elements()
                            .iter()
                            .map(|e| match e {
                                Field::Str(t) => Ok(t.clone()),
                                _ => Err(wrong()),
                            })
                            .collect::<Result<_, _>>()?,
                    ),
                    (Column::FloatList, Field::ListInternal(list)) => Value::FloatList(
                        list.elements()
                            .iter()
                            .map(|e| match e {
                                Field::Float(f) => Ok(*f),
                                _ => Err(wrong()),
                            })
                            .collect::<Result<_, _>>()?,
                    ),
                    _ => return Err(wrong()),
                })
            })
            .collect()
    }
}
