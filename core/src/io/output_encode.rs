//! The encoding side of [`super::CleanedWriter`]: a background thread that
//! turns buffered rows into Parquet row groups, so the caller reads and
//! cleans the next tags while earlier ones are encoded.
//!
//! The float and time columns go through arrow-rs's column writers; the
//! dictionary string columns `tag`, `status` and `fault` are built from
//! their keys by [`super::output_keys`] (the Arrow writer would look every
//! row up by its string). Each batch's columns are encoded as two groups on
//! two threads (the worker and one long-lived helper thread, so no thread,
//! and no fresh allocator heap, is started per batch).

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{Receiver, SyncSender};
use std::sync::Arc;

use arrow_array::builder::NullBufferBuilder;
use arrow_array::{Array, ArrayRef, Float64Array, TimestampMicrosecondArray};
use arrow_schema::SchemaRef;
use parquet::arrow::arrow_writer::{compute_leaves, ArrowColumnWriter, ArrowRowGroupWriterFactory};
use parquet::errors::ParquetError;
use parquet::file::writer::SerializedFileWriter;

use super::output::ROW_GROUP_ROWS;
use super::output_keys::KeyChunk;
use super::output_sink::Sink;
use super::{IoError, Result};
use crate::series::{Fault, Status, TagTable};

/// Column positions in the cleaned schema.
const TAG: usize = 0;
const RAW: usize = 2;
const STATUS: usize = 5;
const FAULT: usize = 6;
/// The columns written by arrow-rs's column writers: `ts`, `raw`, `value`, `std`.
const ARROW_COLUMNS: [usize; 4] = [1, 2, 3, 4];

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
    file: SerializedFileWriter<Sink>,
    factory: ArrowRowGroupWriterFactory,
    schema: SchemaRef,
    /// Column writers of the row group being filled (those of
    /// [`ARROW_COLUMNS`], by column position), its key columns (`tag`,
    /// `status`, `fault`), and its rows.
    group: Option<Group>,
    group_rows: usize,
    groups_done: usize,
    /// The helper thread that encodes `raw` and the key columns while the
    /// worker encodes `ts`, `value`, `std`; `None` when encoding runs on one
    /// thread. (`raw` and `value` are the costly columns.)
    helper: Option<rayon::ThreadPool>,
}

fn write_error(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::Write { path: path.to_path_buf(), source: e.into() }
}

/// The row group being filled: arrow-rs writers by column position, and
/// the key columns `tag`, `status`, `fault`.
type Group = (Vec<(usize, ArrowColumnWriter)>, [KeyChunk; 3]);

/// One buffer's columns: the Arrow arrays of [`ARROW_COLUMNS`] and the keys
/// of the dictionary columns.
struct Columns {
    arrays: Vec<ArrayRef>,
    tags: Vec<String>,
    tag_keys: Vec<i32>,
    status: Vec<i32>,
    fault: Vec<Option<i32>>,
}

impl Encoder {
    pub(super) fn new(
        partial: PathBuf,
        file: SerializedFileWriter<Sink>,
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
        let cols = columns(b);
        let rows = cols.tag_keys.len();
        let mut at = 0;
        while at < rows {
            let n = (ROW_GROUP_ROWS - self.group_rows).min(rows - at);
            self.encode(&cols, at, n)?;
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
        let sink = self.file.into_inner().map_err(|e| write_error(&partial, e))?;
        let file = sink.finish().map_err(|e| write_error(&partial, e))?;
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

    /// Encodes rows `at..at + n` of `cols` into the current row group:
    /// `raw` and the key columns on the helper thread, the others on this one.
    fn encode(&mut self, cols: &Columns, at: usize, n: usize) -> Result<()> {
        let partial = &self.partial;
        if self.group.is_none() {
            let writers = self.factory.create_column_writers(self.groups_done).map_err(|e| write_error(partial, e))?;
            let writers: Vec<(usize, ArrowColumnWriter)> =
                writers.into_iter().enumerate().filter(|(i, _)| ARROW_COLUMNS.contains(i)).collect();
            let descr = self.file.schema_descr();
            let keys = [
                KeyChunk::new(descr.column(TAG), true),
                KeyChunk::new(descr.column(STATUS), false),
                KeyChunk::new(descr.column(FAULT), false),
            ];
            self.group = Some((writers, keys));
        }
        let Some((writers, keys)) = self.group.as_mut() else { return Err(write_error(partial, "no row group")) };
        let fields = self.schema.fields();
        let mut helper_jobs = Vec::new();
        let mut own_jobs = Vec::new();
        for ((i, w), col) in writers.iter_mut().zip(&cols.arrays) {
            let leaves = compute_leaves(&fields[*i], &col.slice(at, n)).map_err(|e| write_error(partial, e))?;
            if *i == RAW {
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
        let write_keys = |keys: &mut [KeyChunk; 3]| -> parquet::errors::Result<()> {
            let r = at..at + n;
            let tags: Vec<&str> = cols.tags.iter().map(|t| t.as_str()).collect();
            let [tag, status, fault] = keys;
            tag.push(&cols.tag_keys[r.clone()], |k| usize::try_from(k).ok(), &tags)?;
            let statuses: Vec<&str> = Status::ALL.iter().map(|s| s.as_str()).collect();
            status.push(&cols.status[r.clone()], |k| usize::try_from(k).ok(), &statuses)?;
            let faults: Vec<&str> = Fault::ALL.iter().map(|f| f.as_str()).collect();
            fault.push(&cols.fault[r], |k| k.and_then(|k| usize::try_from(k).ok()), &faults)
        };
        let Some(pool) = &self.helper else {
            own_jobs.extend(helper_jobs);
            write_all(own_jobs).and_then(|()| write_keys(keys)).map_err(|e| write_error(partial, e))?;
            self.group_rows += n;
            return Ok(());
        };
        let (mine, theirs) =
            on_two_threads(pool, || write_all(helper_jobs).and_then(|()| write_keys(keys)), || write_all(own_jobs));
        mine.and(theirs).map_err(|e| write_error(partial, e))?;
        self.group_rows += n;
        Ok(())
    }

    /// Finishes the current row group (its column chunks closed on two
    /// threads, as they were encoded) and appends it to the file.
    fn close_group(&mut self) -> Result<()> {
        let partial = &self.partial;
        let Some((writers, keys)) = self.group.take() else { return Ok(()) };
        if let Some(k) = keys.iter().find(|k| k.rows() != self.group_rows) {
            return Err(write_error(partial, format!("{} rows in a key column of {}", k.rows(), self.group_rows)));
        }
        let (helper_jobs, own_jobs): (Vec<_>, Vec<_>) = writers.into_iter().partition(|(i, _)| *i == RAW);
        let close_all = |jobs: Vec<(usize, ArrowColumnWriter)>| {
            jobs.into_iter().map(|(i, w)| w.close().map(|c| (i, c))).collect::<parquet::errors::Result<Vec<_>>>()
        };
        let finish_keys = |keys: [KeyChunk; 3]| {
            let [tag, status, fault] = keys;
            Ok::<_, ParquetError>([(TAG, tag.finish()?), (STATUS, status.finish()?), (FAULT, fault.finish()?)])
        };
        let (mut chunks, key_chunks) = match &self.helper {
            None => {
                let mut all = close_all(own_jobs).map_err(|e| write_error(partial, e))?;
                all.extend(close_all(helper_jobs).map_err(|e| write_error(partial, e))?);
                (all, finish_keys(keys).map_err(|e| write_error(partial, e))?)
            }
            Some(pool) => {
                let (mine, theirs) =
                    on_two_threads(pool, || Ok((close_all(helper_jobs), finish_keys(keys))), || close_all(own_jobs));
                let mut all = mine.map_err(|e| write_error(partial, e))?;
                let (raw, keys) = theirs.map_err(|e| write_error(partial, e))?;
                all.extend(raw.map_err(|e| write_error(partial, e))?);
                (all, keys.map_err(|e| write_error(partial, e))?)
            }
        };
        chunks.sort_by_key(|c| c.0);
        let mut chunks = chunks.into_iter().peekable();
        let mut key_chunks = key_chunks.into_iter().peekable();
        let mut rg = self.file.next_row_group().map_err(|e| write_error(partial, e))?;
        for i in 0..self.schema.fields().len() {
            if chunks.peek().is_some_and(|c| c.0 == i) {
                if let Some((_, chunk)) = chunks.next() {
                    chunk.append_to_row_group(&mut rg).map_err(|e| write_error(partial, e))?;
                }
            } else if key_chunks.peek().is_some_and(|c| c.0 == i) {
                if let Some((_, (bytes, close))) = key_chunks.next() {
                    rg.append_column(&bytes, close).map_err(|e| write_error(partial, e))?;
                }
            } else {
                return Err(write_error(partial, format!("no encoded chunk for column {i}")));
            }
        }
        rg.close().map_err(|e| write_error(partial, e))?;
        self.groups_done += 1;
        self.group_rows = 0;
        Ok(())
    }
}

/// A buffer's columns: Arrow arrays for `ts`, `raw`, `value`, `std`, keys
/// for the others.
fn columns(b: Buffer) -> Columns {
    let ts = TimestampMicrosecondArray::new(b.ts.into(), None).with_timezone("UTC");
    let arrays: Vec<ArrayRef> = vec![
        Arc::new(ts),
        Arc::new(raw_floats(b.raw, &b.raw_null)),
        Arc::new(nullable_floats(b.value)),
        Arc::new(nullable_floats(b.std)),
    ];
    debug_assert!(arrays.iter().all(|a| a.len() == b.tag_keys.len()));
    Columns { arrays, tags: b.tags, tag_keys: b.tag_keys, status: b.status, fault: b.fault }
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
fn on_two_threads<A: Send, B>(
    pool: &rayon::ThreadPool,
    theirs: impl FnOnce() -> parquet::errors::Result<A> + Send,
    mine: impl FnOnce() -> parquet::errors::Result<B>,
) -> (parquet::errors::Result<B>, parquet::errors::Result<A>) {
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
