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
//! File metadata: `tagwright.run_id` and `tagwright.version`. Encoding:
//! `ts`, `raw`, `value`, `std` as [`writer_properties`] says (no dictionary,
//! delta encoding for `ts`, byte-stream-split for the floats, the chosen
//! codec); `tag`, `status`, `fault` dictionary-encoded, pages uncompressed
//! (they hold only run lengths; see `output_keys.rs`); minimum/maximum
//! statistics for `tag` and `ts` only; row groups of [`ROW_GROUP_ROWS`] rows.
//!
//! The writer writes `<path>.partial` and renames it to `<path>` in
//! [`CleanedWriter::close`]; a writer dropped without `close` removes the
//! partial file.
//!
//! Speed: rows are buffered by the caller and encoded on a background
//! thread (two threads, in fact; see `output_encode.rs`), so the caller can
//! read and clean the next tags meanwhile
//! ([`CleanedWriter::create_with_threads`] with 1 encodes on the caller's
//! thread instead). At most two batches of
//! [`BATCH_ROWS`] rows are held at once. An encoding error is returned by
//! the next [`CleanedWriter::write_tag`] or by [`CleanedWriter::close`].

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::SyncSender;
use std::sync::{Arc, Mutex};

use arrow_schema::{DataType, Field, Schema, SchemaRef, TimeUnit};
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression as PqCompression, Encoding, ZstdLevel};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::{EnabledStatistics, WriterProperties};
use parquet::schema::types::ColumnPath;

use super::output_encode::{spawn, Buffer, Encoder, Worker};
use super::output_sink::Sink;
use super::{IoError, Result};
use crate::pipeline::Compression;
use crate::series::{CheckedTable, TagTable};

/// Rows per row group of `cleaned.parquet` (about one million).
pub const ROW_GROUP_ROWS: usize = 1 << 20;
/// Rows buffered before they are handed to the encoding thread.
pub const BATCH_ROWS: usize = 64 * 1024;
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

/// Writer settings of `cleaned.parquet` (for its plain columns `ts`, `raw`,
/// `value`, `std`, written by Parquet's column writers), also used by the
/// bare read+write
/// benchmark: the chosen compression (zstd level 1 or snappy); no
/// dictionary for `ts`, `raw`, `value`, `std`; delta encoding for
/// `ts`; byte-stream-split for the floats; statistics for `tag` and `ts`
/// only; row groups of [`ROW_GROUP_ROWS`] rows; the given key-value metadata.
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
    // Statistics only where a reader prunes by them (tag and time). The
    // per-value minimum and maximum of the other columns cost about 7% of
    // the encoding time and tell a reader of process data nothing useful
    // (every row group holds many tags).
    for c in ["raw", "value", "std", "status", "fault"] {
        b = b.set_column_statistics_enabled(ColumnPath::from(c), EnabledStatistics::None);
    }
    b.build()
}

/// Writes `cleaned.parquet` tag by tag. See the module documentation.
pub struct CleanedWriter {
    path: PathBuf,
    partial: PathBuf,
    buf: Buffer,
    last_tag: Option<String>,
    rows: u64,
    /// The encoding thread and its input; `None` once closed (or failed),
    /// and when encoding runs on the caller's thread (`inline`).
    tx: Option<SyncSender<Buffer>>,
    worker: Option<Worker>,
    inline: Option<Encoder>,
    /// Set when the writer is dropped without `close`: the worker stops.
    abort: Arc<AtomicBool>,
    /// The footer's key-value metadata, shared with the encoder.
    meta: Arc<Mutex<Vec<KeyValue>>>,
}

impl std::fmt::Debug for CleanedWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CleanedWriter").field("path", &self.path).field("rows", &self.rows).finish()
    }
}

impl CleanedWriter {
    /// Starts `path` (written as `<path>.partial` until [`CleanedWriter::close`]),
    /// encoding on two background threads.
    pub fn create(path: &Path, run_id: &str, compression: Compression) -> Result<Self> {
        Self::create_with_threads(path, run_id, compression, 2)
    }

    /// As [`CleanedWriter::create`], with the number of encoding threads:
    /// 1 encodes on the caller's thread inside `write_tag` and `close` (for
    /// a run limited to one thread); 2 or more encode on a background
    /// thread and a helper, in parallel with the caller. The file is the
    /// same either way.
    pub fn create_with_threads(path: &Path, run_id: &str, compression: Compression, threads: usize) -> Result<Self> {
        let mut name = path.as_os_str().to_owned();
        name.push(".partial");
        let partial = PathBuf::from(name);
        let file = File::create(&partial).map_err(|e| write_error(&partial, e))?;
        // With encoding in the background, the file is written on a thread
        // of its own too (output_sink.rs).
        let file =
            if threads > 1 { Sink::threaded(file).map_err(|e| write_error(&partial, e))? } else { Sink::Direct(file) };
        // The run id and version go into the footer (see `set_run_id`).
        let meta = Arc::new(Mutex::new(vec![
            KeyValue::new(META_RUN_ID.to_string(), run_id.to_string()),
            KeyValue::new(META_VERSION.to_string(), env!("CARGO_PKG_VERSION").to_string()),
        ]));
        let schema = cleaned_schema();
        // The ArrowWriter sets up the Parquet schema and the embedded Arrow
        // schema; the row groups are then written column chunk by column
        // chunk (output_encode.rs).
        let writer = ArrowWriter::try_new(file, schema, Some(writer_properties(compression, Vec::new())))
            .map_err(|e| write_error(&partial, e))?;
        let (file, _) = writer.into_serialized_writer().map_err(|e| write_error(&partial, e))?;
        let abort = Arc::new(AtomicBool::new(false));
        let encoder = Encoder::new(partial.clone(), file, threads > 1, meta.clone())?;
        let (tx, worker, inline) = if threads > 1 {
            let (tx, worker) = spawn(encoder, abort.clone())?;
            (Some(tx), Some(worker), None)
        } else {
            (None, None, Some(encoder))
        };
        Ok(CleanedWriter {
            path: path.to_path_buf(),
            partial,
            buf: Buffer::with_capacity(BATCH_ROWS + BATCH_ROWS / 8),
            last_tag: None,
            rows: 0,
            tx,
            worker,
            inline,
            abort,
            meta,
        })
    }

    /// Sets the run id written into the file's metadata at
    /// [`CleanedWriter::close`] (for a run whose id is known only at its end).
    pub fn set_run_id(&mut self, run_id: &str) {
        let mut meta = self.meta.lock().unwrap_or_else(|p| p.into_inner());
        for kv in meta.iter_mut().filter(|kv| kv.key == META_RUN_ID) {
            kv.value = Some(run_id.to_string());
        }
    }

    /// Appends one tag's rows. Tags must come in sorted order, each once;
    /// rows in strictly increasing time; all columns of equal length.
    pub fn write_tag(&mut self, t: &TagTable) -> Result<()> {
        self.check(t, true)?;
        self.append(t)
    }

    /// As [`CleanedWriter::write_tag`], taking the table: a tag of at least
    /// half a batch goes to the encoder as it is, its columns moved rather
    /// than copied into the buffer.
    pub fn write_tag_owned(&mut self, t: TagTable) -> Result<()> {
        self.check(&t, true)?;
        self.send_owned(t)
    }

    /// As [`CleanedWriter::write_tag_owned`], for a table that passed
    /// [`TagTable::check`]: its times are not scanned again (the tag order
    /// and the column lengths still are).
    pub fn write_checked(&mut self, t: CheckedTable) -> Result<()> {
        self.check(&t, false)?;
        self.send_owned(t.into_table())
    }

    fn send_owned(&mut self, t: TagTable) -> Result<()> {
        let n = t.ts_us.len();
        if n < BATCH_ROWS / 2 {
            return self.append(&t);
        }
        // Rows buffered before this tag go first.
        self.flush()?;
        self.rows += n as u64;
        self.send(Buffer::from_table(t))
    }

    /// Checks a table before it is written (its times too, with `times`);
    /// remembers its tag.
    fn check(&mut self, t: &TagTable, times: bool) -> Result<()> {
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
        if let Some(i) = times.then(|| crate::series::first_not_increasing(&t.ts_us)).flatten() {
            return Err(bad(format!("times do not increase at row {i}")));
        }
        self.last_tag = Some(t.tag.clone());
        Ok(())
    }

    /// Copies a checked table into the buffer, handing the buffer on first
    /// when the rows would not fit in it.
    fn append(&mut self, t: &TagTable) -> Result<()> {
        let n = t.ts_us.len();
        if n == 0 {
            return Ok(());
        }
        if self.buf.len() > 0 && self.buf.len() + n > self.buf.ts.capacity() {
            self.flush()?;
        }
        self.buf.push_table(t);
        self.rows += n as u64;
        if self.buf.len() >= BATCH_ROWS {
            self.flush()?;
        }
        Ok(())
    }

    /// Hands the buffered rows to the encoding thread.
    fn flush(&mut self) -> Result<()> {
        if self.buf.len() == 0 {
            return Ok(());
        }
        let b = std::mem::replace(&mut self.buf, Buffer::with_capacity(BATCH_ROWS + BATCH_ROWS / 8));
        self.send(b)
    }

    /// Encodes a buffer (inline) or sends it to the encoding thread.
    fn send(&mut self, b: Buffer) -> Result<()> {
        if let Some(enc) = self.inline.as_mut() {
            return enc.push(b);
        }
        let sent = match &self.tx {
            Some(tx) => tx.send(b).is_ok(),
            None => false,
        };
        if sent {
            return Ok(());
        }
        // The worker stopped: its error says why.
        self.tx = None;
        match self.join() {
            Err(e) => Err(e),
            Ok(_) => Err(write_error(&self.partial, "the writer is closed")),
        }
    }

    /// Waits for the encoding thread to finish.
    fn join(&mut self) -> Result<Option<File>> {
        match self.worker.take() {
            Some(h) => h.join().unwrap_or_else(|_| Err(write_error(&self.partial, "the encoding thread panicked"))),
            None => Err(write_error(&self.partial, "the writer is closed")),
        }
    }

    /// Encodes what is left, writes the footer, syncs the file and renames
    /// it into place; returns the number of rows written.
    pub fn close(mut self) -> Result<u64> {
        self.flush()?;
        self.tx = None;
        let file = match self.inline.take() {
            Some(enc) => Some(enc.finish()?),
            None => self.join()?,
        };
        drop(file);
        std::fs::rename(&self.partial, &self.path).map_err(|e| write_error(&self.path, e))?;
        Ok(self.rows)
    }
}

impl Drop for CleanedWriter {
    fn drop(&mut self) {
        if self.worker.is_some() {
            // Dropped without `close` (an error upstream): stop the worker, remove the partial file.
            self.abort.store(true, Ordering::Relaxed);
            self.tx = None;
            let _ = self.join();
        }
        // After a successful `close` the partial file was renamed away.
        if self.partial.exists() {
            let _ = std::fs::remove_file(&self.partial);
        }
    }
}

fn write_error(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::Write { path: path.to_path_buf(), source: e.into() }
}

#[cfg(test)]
#[path = "output_tests.rs"]
mod tests;
