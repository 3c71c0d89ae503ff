//! The encoding side of [`super::CleanedWriter`]: a background thread that
//! turns buffered rows into Arrow arrays and Parquet row groups, so the
//! caller reads and cleans the next tags while earlier ones are encoded.
//!
//! Each batch's columns are encoded as two groups on two threads (the
//! worker and one long-lived helper thread, so no thread, and no fresh
//! allocator heap, is started per batch): the Parquet encoder looks every
//! row of the dictionary column `tag` up in its dictionary, which makes it
//! about as costly as two or three float columns. The file is the same as a
//! one-thread `ArrowWriter` writes.

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{Receiver, SyncSender};
use std::sync::Arc;

use arrow_array::builder::NullBufferBuilder;
use arrow_array::types::Int32Type;
use arrow_array::{
    ArrayRef, DictionaryArray, Float64Array, Int32Array, RecordBatch, StringArray, TimestampMicrosecondArray,
};
use arrow_schema::SchemaRef;
use parquet::arrow::arrow_writer::{compute_leaves, ArrowColumnWriter, ArrowRowGroupWriterFactory};
use parquet::errors::ParquetError;
use parquet::file::writer::SerializedFileWriter;

use super::output::ROW_GROUP_ROWS;
use super::{IoError, Result};
use crate::series::{Fault, Status, TagTable};

/// Columns encoded on the helper thread: `tag`, `raw`, `fault`; the worker
/// encodes `ts`, `value`, `std`, `status`. (The dictionary column `tag`
/// costs about as much as two or three of the float and time columns, since
/// every row is looked up in its dictionary; `status` is plain strings and
/// `fault` is mostly null. Measured on 8.6 M rows, this split and the one
/// with `raw` on the worker take the same CPU time.)
const HELPER_COLUMNS: [usize; 3] = [0, 2, 6];

/// Rows waiting to be encoded, column by column.
#[derive(Debug, Default)]
pub(super) struct Buffer {
    /// Tags of this batch; `tag_keys` index them.
    pub tags: Vec<String>,
    pub tag_keys: Vec<i32>,
    pub ts: Vec<i64>,
    pub raw: Vec<f64>,
    /// Rows whose `raw` is null (inserted rows).
    pub raw_null: Vec<bool>,
    pub value: Vec<f64>,
    pub std: Vec<f64>,
    pub status: Vec<i32>,
    pub fault: Vec<Option<i32>>,
}

impl Buffer {
    pub(super) fn len(&self) -> usize {
        self.ts.len()
    }

    /// One tag's table as a buffer, its columns moved, not copied.
    pub(super) fn from_table(t: TagTable) -> Buffer {
        let n = t.ts_us.len();
        Buffer {
            tags: vec![t.tag],
            tag_keys: vec![0; n],
            raw_null: t.status.iter().map(|&s| s == Status::Filled).collect(),
            status: t.status.iter().map(|&s| s as i32).collect(),
            fault: t.fault.iter().map(|f| f.map(|f| f as i32)).collect(),
            ts: t.ts_us,
            raw: t.raw,
            value: t.value,
            std: t.std,
        }
    }

    /// Appends a copy of one tag's rows.
    pub(super) fn push_table(&mut self, t: &TagTable) {
        let n = t.ts_us.len();
        let key = self.tags.len() as i32;
        self.tags.push(t.tag.clone());
        self.tag_keys.extend(std::iter::repeat_n(key, n));
        self.ts.extend_from_slice(&t.ts_us);
        self.raw.extend_from_slice(&t.raw);
        self.raw_null.extend(t.status.iter().map(|&s| s == Status::Filled));
        self.value.extend_from_slice(&t.value);
        self.std.extend_from_slice(&t.std);
        self.status.extend(t.status.iter().map(|&s| s as i32));
        self.fault.extend(t.fault.iter().map(|f| f.map(|f| f as i32)));
    }

    /// An empty buffer with room for `n` rows.
    pub(super) fn with_capacity(n: usize) -> Buffer {
        Buffer {
            tags: Vec::new(),
            tag_keys: Vec::with_capacity(n),
            ts: Vec::with_capacity(n),
            raw: Vec::with_capacity(n),
            raw_null: Vec::with_capacity(n),
            value: Vec::with_capacity(n),
            std: Vec::with_capacity(n),
            status: Vec::with_capacity(n),
            fault: Vec::with_capacity(n),
        }
    }
}

/// The encoder running on the worker thread.
pub(super) struct Encoder {
    partial: PathBuf,
    file: SerializedFileWriter<File>,
    factory: ArrowRowGroupWriterFactory,
    schema: SchemaRef,
    /// Column writers of the row group being filled, and its rows.
    group: Option<Vec<ArrowColumnWriter>>,
    group_rows: usize,
    groups_done: usize,
    /// The helper thread that encodes [`HELPER_COLUMNS`] while the worker
    /// encodes the others; `None` when encoding runs on one thread.
    helper: Option<rayon::ThreadPool>,
}

fn write_error(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::Write { path: path.to_path_buf(), source: e.into() }
}

impl Encoder {
    pub(super) fn new(
        partial: PathBuf,
        file: SerializedFileWriter<File>,
        factory: ArrowRowGroupWriterFactory,
        schema: SchemaRef,
        parallel: bool,
    ) -> Result<Self> {
        let helper = if parallel {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(1)
                .thread_name(|_| "tagwright-writer-helper".into())
                .build()
                .map_err(|e| write_error(&partial, e))?;
            Some(pool)
        } else {
            None
        };
        Ok(Encoder { partial, file, factory, schema, group: None, group_rows: 0, groups_done: 0, helper })
    }

    /// Encodes one buffer of rows, closing row groups as they fill.
    pub(super) fn push(&mut self, b: Buffer) -> Result<()> {
        let batch = self.batch(b)?;
        let mut at = 0;
        while at < batch.num_rows() {
            let n = (ROW_GROUP_ROWS - self.group_rows).min(batch.num_rows() - at);
            self.encode(&batch.slice(at, n))?;
            at += n;
            if self.group_rows == ROW_GROUP_ROWS {
                self.close_group()?;
            }
        }
        Ok(())
    }

    /// Closes the last row group, writes the footer and syncs the file.
    pub(super) fn finish(mut self) -> Result<File> {
        self.close_group()?;
        let partial = self.partial.clone();
        let file = self.file.into_inner().map_err(|e| write_error(&partial, e))?;
        file.sync_all().map_err(|e| write_error(&partial, e))?;
        Ok(file)
    }

    /// Encodes buffers from `rx` until the sender hangs up (or `abort` is
    /// set: the writer was dropped), then writes the footer and returns the
    /// synced file.
    pub(super) fn run(mut self, rx: Receiver<Buffer>, abort: Arc<AtomicBool>) -> Result<Option<File>> {
        for b in rx {
            if abort.load(Ordering::Relaxed) {
                return Ok(None);
            }
            self.push(b)?;
        }
        if abort.load(Ordering::Relaxed) {
            return Ok(None);
        }
        self.finish().map(Some)
    }

    /// The buffered rows as a record batch of the cleaned schema.
    fn batch(&self, b: Buffer) -> Result<RecordBatch> {
        let err = |e: arrow_schema::ArrowError| write_error(&self.partial, e);
        let dict = |keys: Int32Array, values: Vec<&str>| {
            DictionaryArray::<Int32Type>::try_new(keys, Arc::new(StringArray::from(values)) as ArrayRef).map_err(err)
        };
        let tag = DictionaryArray::<Int32Type>::try_new(
            Int32Array::from(b.tag_keys),
            Arc::new(StringArray::from(b.tags)) as ArrayRef,
        )
        .map_err(err)?;
        let status = dict(Int32Array::from(b.status), Status::ALL.iter().map(|s| s.as_str()).collect())?;
        let fault = dict(Int32Array::from(b.fault), Fault::ALL.iter().map(|f| f.as_str()).collect())?;
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
        RecordBatch::try_new(self.schema.clone(), columns).map_err(err)
    }

    /// Encodes a batch into the current row group: the columns of
    /// [`HELPER_COLUMNS`] on a helper thread, the others on this one.
    fn encode(&mut self, batch: &RecordBatch) -> Result<()> {
        let partial = &self.partial;
        if self.group.is_none() {
            let writers = self.factory.create_column_writers(self.groups_done).map_err(|e| write_error(partial, e))?;
            self.group = Some(writers);
        }
        let Some(writers) = self.group.as_mut() else { return Err(write_error(partial, "no row group")) };
        let mut helper_jobs = Vec::new();
        let mut own_jobs = Vec::new();
        for (i, ((w, field), col)) in writers.iter_mut().zip(self.schema.fields()).zip(batch.columns()).enumerate() {
            let leaves = compute_leaves(field, col).map_err(|e| write_error(partial, e))?;
            if HELPER_COLUMNS.contains(&i) {
                helper_jobs.push((w, leaves));
            } else {
                own_jobs.push((w, leaves));
            }
        }
        let write_all = |jobs: Vec<(&mut ArrowColumnWriter, Vec<_>)>| -> parquet::errors::Result<()> {
            for (w, leaves) in jobs {
                for leaf in &leaves {
                    w.write(leaf)?;
                }
            }
            Ok(())
        };
        let Some(pool) = &self.helper else {
            own_jobs.extend(helper_jobs);
            write_all(own_jobs).map_err(|e| write_error(partial, e))?;
            self.group_rows += batch.num_rows();
            return Ok(());
        };
        let (mine, theirs) = on_two_threads(pool, || write_all(helper_jobs), || write_all(own_jobs));
        mine.and(theirs).map_err(|e| write_error(partial, e))?;
        self.group_rows += batch.num_rows();
        Ok(())
    }

    /// Finishes the current row group (its column chunks closed on two
    /// threads, as they were encoded) and appends it to the file.
    fn close_group(&mut self) -> Result<()> {
        let partial = &self.partial;
        let Some(writers) = self.group.take() else { return Ok(()) };
        let (helper_jobs, own_jobs): (Vec<_>, Vec<_>) =
            writers.into_iter().enumerate().partition(|(i, _)| HELPER_COLUMNS.contains(i));
        let close_all = |jobs: Vec<(usize, ArrowColumnWriter)>| {
            jobs.into_iter().map(|(i, w)| w.close().map(|c| (i, c))).collect::<parquet::errors::Result<Vec<_>>>()
        };
        let mut chunks = match &self.helper {
            None => {
                let mut all = close_all(own_jobs).map_err(|e| write_error(partial, e))?;
                all.extend(close_all(helper_jobs).map_err(|e| write_error(partial, e))?);
                all
            }
            Some(pool) => {
                let (mine, theirs) = on_two_threads(pool, || close_all(helper_jobs), || close_all(own_jobs));
                let mut all = mine.map_err(|e| write_error(partial, e))?;
                all.extend(theirs.map_err(|e| write_error(partial, e))?);
                all
            }
        };
        chunks.sort_by_key(|c| c.0);
        let mut rg = self.file.next_row_group().map_err(|e| write_error(partial, e))?;
        for (_, chunk) in chunks {
            chunk.append_to_row_group(&mut rg).map_err(|e| write_error(partial, e))?;
        }
        rg.close().map_err(|e| write_error(partial, e))?;
        self.groups_done += 1;
        self.group_rows = 0;
        Ok(())
    }
}

/// The encoding thread: it returns the finished file (`None` when stopped early).
pub(super) type Worker = std::thread::JoinHandle<Result<Option<File>>>;

/// Starts the worker thread; returns the sending end (at most one buffer
/// waits while another is encoded).
pub(super) fn spawn(encoder: Encoder, abort: Arc<AtomicBool>) -> Result<(SyncSender<Buffer>, Worker)> {
    let (tx, rx) = std::sync::mpsc::sync_channel::<Buffer>(1);
    let partial = encoder.partial.clone();
    let handle = std::thread::Builder::new()
        .name("tagwright-writer".into())
        .spawn(move || encoder.run(rx, abort))
        .map_err(|e| write_error(&partial, e))?;
    Ok((tx, handle))
}

/// Runs `theirs` on the helper pool's thread and `mine` on this one, at
/// once; returns (mine, theirs). A panic in `theirs` becomes an error.
fn on_two_threads<T: Send>(
    pool: &rayon::ThreadPool,
    theirs: impl FnOnce() -> parquet::errors::Result<T> + Send,
    mine: impl FnOnce() -> parquet::errors::Result<T>,
) -> (parquet::errors::Result<T>, parquet::errors::Result<T>) {
    let mut out = None;
    let slot = &mut out;
    let mine = pool.in_place_scope(|s| {
        s.spawn(move |_| {
            let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(theirs));
            *slot = Some(r.unwrap_or_else(|_| Err(ParquetError::General("the encoding helper panicked".into()))));
        });
        mine()
    });
    let theirs = out.unwrap_or_else(|| Err(ParquetError::General("the encoding helper did not finish".into())));
    (mine, theirs)
}

/// Floats with NaN written as null.
fn nullable_floats(mut v: Vec<f64>) -> Float64Array {
    let null: Vec<bool> = v.iter().map(|x| x.is_nan()).collect();
    for x in v.iter_mut().filter(|x| x.is_nan()) {
        *x = 0.0;
    }
    floats_with_nulls(v, &null)
}

/// The `raw` column: null on inserted rows, NaN kept elsewhere.
fn raw_floats(mut v: Vec<f64>, null: &[bool]) -> Float64Array {
    for (x, _) in v.iter_mut().zip(null).filter(|(_, &n)| n) {
        *x = 0.0;
    }
    floats_with_nulls(v, null)
}

/// A float column with the rows marked in `null` null (appended run by run).
fn floats_with_nulls(v: Vec<f64>, null: &[bool]) -> Float64Array {
    if !null.contains(&true) {
        return Float64Array::new(v.into(), None);
    }
    let mut nulls = NullBufferBuilder::new(v.len());
    let mut i = 0;
    while i < null.len() {
        let run = null[i..].iter().take_while(|&&n| n == null[i]).count();
        if null[i] {
            nulls.append_n_nulls(run);
        } else {
            nulls.append_n_non_nulls(run);
        }
        i += run;
    }
    Float64Array::new(v.into(), nulls.finish())
}
