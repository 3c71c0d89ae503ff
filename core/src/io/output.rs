//! The writer of `cleaned.parquet` (schema in `docs/input.md` and the
//! design's data contracts).
//!
//! | column | Arrow type | nulls |
//! |---|---|---|
//! | `tag` | dictionary of Utf8 (Int32 keys) | never |
//! | `ts` | timestamp[us, UTC] | never |
//! | `raw` | float64 | on `filled` rows (a reading without a finite value stays NaN) |
//! | `value` | float64 | where the value is NaN |
//! | `std` | float64 | where the standard deviation is NaN |
//! | `status` | dictionary of Utf8 (Int32 keys): `ok`, `filled`, `replaced`, `rejected` | never |
//! | `fault` | dictionary of Utf8 (Int32 keys): `spike`, `stuck`, ... | where no fault |
//!
//! File metadata: `tagwright.run_id` and `tagwright.version`. Encoding (see
//! [`writer_properties`]): no dictionary for the time and the three float
//! columns; delta encoding for `ts`; byte-stream-split for `raw`, `value`
//! and `std`; row groups of [`ROW_GROUP_ROWS`] rows.
//!
//! The writer writes `<path>.partial` and renames it to `<path>` in
//! [`CleanedWriter::close`]; a writer dropped without `close` removes the
//! partial file.

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::NullBufferBuilder;
use arrow_array::types::Int32Type;
use arrow_array::{
    ArrayRef, DictionaryArray, Float64Array, Int32Array, RecordBatch, StringArray, TimestampMicrosecondArray,
};
use arrow_schema::{DataType, Field, Schema, SchemaRef, TimeUnit};
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression as PqCompression, Encoding, ZstdLevel};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use parquet::schema::types::ColumnPath;

use super::{IoError, Result};
use crate::pipeline::Compression;
use crate::series::{Fault, Status, TagTable};

/// Rows per row group of `cleaned.parquet` (about one million).
pub const ROW_GROUP_ROWS: usize = 1 << 20;
/// Rows buffered before a record batch is handed to the Parquet writer.
const BATCH_ROWS: usize = 64 * 1024;
/// Metadata key of the run id.
pub const META_RUN_ID: &str = "tagwright.run_id";
/// Metadata key of the tool version.
pub const META_VERSION: &str = "tagwright.version";

fn dict_type() -> DataType {
    DataType::Dictionary(Box::new(DataType::Int32), Box::new(DataType::Utf8))
}

/// The Arrow schema of `cleaned.parquet`.
pub fn cleaned_schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("tag", dict_type(), false),
        Field::new("ts", DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())), false),
        Field::new("raw", DataType::Float64, true),
        Field::new("value", DataType::Float64, true),
        Field::new("std", DataType::Float64, true),
        Field::new("status", dict_type(), false),
        Field::new("fault", dict_type(), true),
    ]))
}

/// Writer settings of `cleaned.parquet`, also used by the bare read+write
/// benchmark: the chosen compression (zstd level 1 or snappy); no
/// dictionary for `ts`, `raw`, `value`, `std`; delta encoding for `ts`;
/// byte-stream-split for the floats; row groups of [`ROW_GROUP_ROWS`] rows;
/// the given key-value metadata.
pub fn writer_properties(compression: Compression, metadata: Vec<KeyValue>) -> WriterProperties {
    let codec = match compression {
        Compression::Zstd => PqCompression::ZSTD(ZstdLevel::default()),
        Compression::Snappy => PqCompression::SNAPPY,
    };
    let mut b = WriterProperties::builder()
        .set_compression(codec)
        .set_max_row_group_row_count(Some(ROW_GROUP_ROWS))
        .set_key_value_metadata(Some(metadata))
        .set_column_dictionary_enabled(ColumnPath::from("ts"), false)
        .set_column_encoding(ColumnPath::from("ts"), Encoding::DELTA_BINARY_PACKED);
    for c in ["raw", "value", "std"] {
        b = b
            .set_column_dictionary_enabled(ColumnPath::from(c), false)
            .set_column_encoding(ColumnPath::from(c), Encoding::BYTE_STREAM_SPLIT);
    }
    b.build()
}

/// Rows waiting to be written.
#[derive(Default)]
struct Buffer {
    /// Tags of this batch; `tag_keys` index them.
    tags: Vec<String>,
    tag_keys: Vec<i32>,
    ts: Vec<i64>,
    raw: Vec<f64>,
    /// Rows whose `raw` is null (inserted rows).
    raw_null: Vec<bool>,
    value: Vec<f64>,
    std: Vec<f64>,
    status: Vec<i32>,
    fault: Vec<Option<i32>>,
}

impl Buffer {
    fn len(&self) -> usize {
        self.ts.len()
    }
}

/// Writes `cleaned.parquet` tag by tag. See the module documentation.
pub struct CleanedWriter {
    path: PathBuf,
    partial: PathBuf,
    writer: Option<ArrowWriter<File>>,
    schema: SchemaRef,
    buf: Buffer,
    last_tag: Option<String>,
    rows: u64,
}

impl std::fmt::Debug for CleanedWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CleanedWriter").field("path", &self.path).field("rows", &self.rows).finish()
    }
}

impl CleanedWriter {
    /// Starts `path` (written as `<path>.partial` until [`CleanedWriter::close`]).
    pub fn create(path: &Path, run_id: &str, compression: Compression) -> Result<Self> {
        let mut name = path.as_os_str().to_owned();
        name.push(".partial");
        let partial = PathBuf::from(name);
        let file = File::create(&partial).map_err(|e| write_error(&partial, e))?;
        let metadata = vec![
            KeyValue::new(META_RUN_ID.to_string(), run_id.to_string()),
            KeyValue::new(META_VERSION.to_string(), env!("CARGO_PKG_VERSION").to_string()),
        ];
        let schema = cleaned_schema();
        let writer = ArrowWriter::try_new(file, schema.clone(), Some(writer_properties(compression, metadata)))
            .map_err(|e| write_error(&partial, e))?;
        Ok(CleanedWriter {
            path: path.to_path_buf(),
            partial,
            writer: Some(writer),
            schema,
            buf: Buffer::default(),
            last_tag: None,
            rows: 0,
        })
    }

    /// Appends one tag's rows. Tags must come in sorted order, each once;
    /// rows in strictly increasing time; all columns of equal length.
    pub fn write_tag(&mut self, t: &TagTable) -> Result<()> {
        let bad = |reason: String| IoError::BadTable { path: self.path.clone(), tag: t.tag.clone(), reason };
        let n = t.ts_us.len();
        let lens = [t.raw.len(), t.value.len(), t.std.len(), t.status.len(), t.fault.len()];
        if lens.iter().any(|&l| l != n) {
            return Err(bad(format!("column lengths differ ({n} times; raw, value, std, status, fault: {lens:?})")));
        }
        if let Some(last) = &self.last_tag {
            if t.tag.as_str() <= last.as_str() {
                return Err(bad(format!(
                    "tags must be written in sorted order, each once; `{}` comes after `{last}`",
                    t.tag
                )));
            }
        }
        if let Some(i) = (1..n).find(|&i| t.ts_us[i] <= t.ts_us[i - 1]) {
            return Err(bad(format!("times do not increase at row {i}")));
        }
        self.last_tag = Some(t.tag.clone());
        if n == 0 {
            return Ok(());
        }
        let key = self.buf.tags.len() as i32;
        self.buf.tags.push(t.tag.clone());
        let b = &mut self.buf;
        b.tag_keys.extend(std::iter::repeat_n(key, n));
        b.ts.extend_from_slice(&t.ts_us);
        b.raw.extend_from_slice(&t.raw);
        b.raw_null.extend(t.status.iter().map(|&s| s == Status::Filled));
        b.value.extend_from_slice(&t.value);
        b.std.extend_from_slice(&t.std);
        b.status.extend(t.status.iter().map(|&s| s as i32));
        b.fault.extend(t.fault.iter().map(|f| f.map(|f| f as i32)));
        self.rows += n as u64;
        if self.buf.len() >= BATCH_ROWS {
            self.flush()?;
        }
        Ok(())
    }

    /// Hands the buffered rows to the Parquet writer.
    fn flush(&mut self) -> Result<()> {
        if self.buf.len() == 0 {
            return Ok(());
        }
        let b = std::mem::take(&mut self.buf);
        let err = |e: arrow_schema::ArrowError| write_error(&self.partial, e);
        let tag = DictionaryArray::<Int32Type>::try_new(
            Int32Array::from(b.tag_keys),
            Arc::new(StringArray::from(b.tags)) as ArrayRef,
        )
        .map_err(err)?;
        let status_names: Vec<&str> = Status::ALL.iter().map(|s| s.as_str()).collect();
        let status = DictionaryArray::<Int32Type>::try_new(
            Int32Array::from(b.status),
            Arc::new(StringArray::from(status_names)) as ArrayRef,
        )
        .map_err(err)?;
        let fault_names: Vec<&str> = Fault::ALL.iter().map(|f| f.as_str()).collect();
        let fault = DictionaryArray::<Int32Type>::try_new(
            Int32Array::from(b.fault),
            Arc::new(StringArray::from(fault_names)) as ArrayRef,
        )
        .map_err(err)?;
        let ts = TimestampMicrosecondArray::new(b.ts.into(), None).with_timezone("UTC");
        let columns: Vec<ArrayRef> = vec![
            Arc::new(tag),
            Arc::new(ts),
            Arc::new(raw_floats(b.raw, &b.raw_null)),
            Arc::new(nullable_floats(b.value)),
            Arc::new(nullable_floats(b.std)),
            Arc::new(status),
            Arc::new(fault),
        ];
        let batch = RecordBatch::try_new(self.schema.clone(), columns).map_err(err)?;
        let Some(w) = self.writer.as_mut() else {
            return Err(write_error(&self.partial, "the writer is closed"));
        };
        w.write(&batch).map_err(|e| write_error(&self.partial, e))
    }

    /// Writes the footer, syncs the file and renames it into place; returns
    /// the number of rows written.
    pub fn close(mut self) -> Result<u64> {
        self.flush()?;
        let Some(w) = self.writer.take() else {
            return Err(write_error(&self.partial, "the writer is closed"));
        };
        let file = w.into_inner().map_err(|e| write_error(&self.partial, e))?;
        file.sync_all().map_err(|e| write_error(&self.partial, e))?;
        drop(file);
        std::fs::rename(&self.partial, &self.path).map_err(|e| write_error(&self.path, e))?;
        Ok(self.rows)
    }
}

impl Drop for CleanedWriter {
    fn drop(&mut self) {
        if self.writer.take().is_some() {
            let _ = std::fs::remove_file(&self.partial);
        }
    }
}

/// Floats with NaN written as null.
fn nullable_floats(mut v: Vec<f64>) -> Float64Array {
    let mut nulls = NullBufferBuilder::new(v.len());
    for x in v.iter_mut() {
        if x.is_nan() {
            nulls.append_null();
            *x = 0.0;
        } else {
            nulls.append_non_null();
        }
    }
    Float64Array::new(v.into(), nulls.finish())
}

/// The `raw` column: null on inserted rows, NaN kept elsewhere.
fn raw_floats(mut v: Vec<f64>, null: &[bool]) -> Float64Array {
    let mut nulls = NullBufferBuilder::new(v.len());
    for (x, &n) in v.iter_mut().zip(null) {
        if n {
            nulls.append_null();
            *x = 0.0;
        } else {
            nulls.append_non_null();
        }
    }
    Float64Array::new(v.into(), nulls.finish())
}

fn write_error(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::Write { path: path.to_path_buf(), source: e.into() }
}

#[cfg(test)]
#[path = "output_tests.rs"]
mod tests;
