//! The encoding side of [`super::CleanedWriter`]: a background thread that
//! turns buffered rows into Parquet row groups, so the caller reads and
//! cleans the next tags while earlier ones are encoded.
//!
//! The plain columns `ts`, `raw`, `value`, `std` go through Parquet's
//! column writers ([`super::output_plain`]); the dictionary string columns
//! `tag`, `status` and `fault` are built from their keys by
//! [`super::output_keys`] (the Arrow writer would look every row up by its
//! string). Each batch's columns are encoded as two groups on two threads
//! (the worker and one long-lived helper thread, so no thread, and no fresh
//! allocator heap, is started per batch).

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{Receiver, SyncSender};
use std::sync::{Arc, Mutex};

use parquet::errors::ParquetError;
use parquet::file::metadata::KeyValue;
use parquet::file::writer::SerializedFileWriter;

use super::output::ROW_GROUP_ROWS;
use super::output_keys::KeyChunk;
use super::output_plain::PlainChunk;
use super::output_sink::Sink;
use super::{IoError, Result};
use crate::series::{Fault, Status, TagTable};

/// Column positions in the cleaned schema.
const TAG: usize = 0;
const TS: usize = 1;
const RAW: usize = 2;
const VALUE: usize = 3;
const STD: usize = 4;
const STATUS: usize = 5;
const FAULT: usize = 6;

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
    /// The row group being filled (see [`Group`]) and its rows.
    group: Option<Group>,
    group_rows: usize,
    /// The buffers of the last row group's plain column chunks, by column
    /// position, for the next group's chunks.
    buffers: [Vec<u8>; 5],
    /// The helper thread that encodes `raw` and the key columns while the
    /// worker encodes `ts`, `value`, `std`; `None` when encoding runs on one
    /// thread. (`raw` and `value` are the costly columns.)
    helper: Option<rayon::ThreadPool>,
    /// The file's key-value metadata, written with the footer (the writer
    /// may learn the run id only when the run ends).
    meta: Arc<Mutex<Vec<KeyValue>>>,
}

fn write_error(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::Write { path: path.to_path_buf(), source: e.into() }
}

/// The row group being filled: the plain columns `ts`, `value`, `std`
/// (encoded on the worker), `raw` (on the helper), and the key columns
/// `tag`, `status`, `fault` (on the helper).
struct Group {
    ts: PlainChunk,
    value: PlainChunk,
    std: PlainChunk,
    raw: PlainChunk,
    keys: [KeyChunk; 3],
}

impl Encoder {
    pub(super) fn new(
        partial: PathBuf,
        file: SerializedFileWriter<Sink>,
        parallel: bool,
        meta: Arc<Mutex<Vec<KeyValue>>>,
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
        Ok(Encoder { partial, file, group: None, group_rows: 0, buffers: Default::default(), helper, meta })
    }

    /// Encodes one buffer of rows, closing row groups as they fill.
    pub(super) fn push(&mut self, cols: Buffer) -> Result<()> {
        let rows = cols.len();
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
        let meta = self.meta.lock().map(|m| m.clone()).unwrap_or_else(|p| p.into_inner().clone());
        for kv in meta {
            self.file.append_key_value_metadata(kv);
        }
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
    fn encode(&mut self, cols: &Buffer, at: usize, n: usize) -> Result<()> {
        let partial = &self.partial;
        if self.group.is_none() {
            let descr = self.file.schema_descr();
            let props = self.file.properties();
            let buffers = &mut self.buffers;
            let mut plain = |i: usize| {
                let buf = std::mem::take(&mut buffers[i]);
                PlainChunk::new(descr.column(i), props.clone(), buf).map_err(|e| write_error(partial, e))
            };
            self.group = Some(Group {
                ts: plain(TS)?,
                raw: plain(RAW)?,
                value: plain(VALUE)?,
                std: plain(STD)?,
                keys: [
                    KeyChunk::new(descr.column(TAG), true),
                    KeyChunk::new(descr.column(STATUS), false),
                    KeyChunk::new(descr.column(FAULT), false),
                ],
            });
        }
        let Some(g) = self.group.as_mut() else { return Err(write_error(partial, "no row group")) };
        let r = at..at + n;
        let (ts, value, std) = (&mut g.ts, &mut g.value, &mut g.std);
        let mut own = || -> parquet::errors::Result<()> {
            ts.push_times(&cols.ts[r.clone()])?;
            value.push_floats(&cols.value[r.clone()], |_, x| x.is_nan())?;
            std.push_floats(&cols.std[r.clone()], |_, x| x.is_nan())
        };
        let (raw, keys) = (&mut g.raw, &mut g.keys);
        let mut theirs = || -> parquet::errors::Result<()> {
            // `raw` is null on inserted rows; a NaN reading stays NaN.
            let raw_null = &cols.raw_null[r.clone()];
            raw.push_floats(&cols.raw[r.clone()], |i, _| raw_null[i])?;
            let tags: Vec<&str> = cols.tags.iter().map(|t| t.as_str()).collect();
            let [tag, status, fault] = keys;
            tag.push(&cols.tag_keys[r.clone()], |k| usize::try_from(k).ok(), &tags)?;
            let statuses: Vec<&str> = Status::ALL.iter().map(|s| s.as_str()).collect();
            status.push(&cols.status[r.clone()], |k| usize::try_from(k).ok(), &statuses)?;
            let faults: Vec<&str> = Fault::ALL.iter().map(|f| f.as_str()).collect();
            fault.push(&cols.fault[r.clone()], |k| k.and_then(|k| usize::try_from(k).ok()), &faults)
        };
        let (mine, theirs) = match &self.helper {
            None => (own(), theirs()),
            Some(pool) => on_two_threads(pool, theirs, own),
        };
        mine.and(theirs).map_err(|e| write_error(partial, e))?;
        self.group_rows += n;
        Ok(())
    }

    /// Finishes the current row group (its column chunks closed on two
    /// threads, as they were encoded) and appends it to the file.
    fn close_group(&mut self) -> Result<()> {
        let partial = &self.partial;
        let Some(g) = self.group.take() else { return Ok(()) };
        let rows = self.group_rows as u64;
        let plain_rows = [g.ts.rows(), g.raw.rows(), g.value.rows(), g.std.rows()];
        if g.keys.iter().any(|k| k.rows() as u64 != rows) || plain_rows.iter().any(|&r| r != rows) {
            let keys: Vec<usize> = g.keys.iter().map(|k| k.rows()).collect();
            return Err(write_error(
                partial,
                format!("a column's rows differ from the row group's {rows} (ts, raw, value, std: {plain_rows:?}; tag, status, fault: {keys:?})"),
            ));
        }
        let Group { ts, raw, value, std, keys } = g;
        let own = || Ok::<_, ParquetError>([(TS, ts.finish()?), (VALUE, value.finish()?), (STD, std.finish()?)]);
        let theirs = || {
            let [tag, status, fault] = keys;
            Ok::<_, ParquetError>([
                (RAW, raw.finish()?),
                (TAG, tag.finish()?),
                (STATUS, status.finish()?),
                (FAULT, fault.finish()?),
            ])
        };
        let (mine, theirs) = match &self.helper {
            None => (own(), theirs()),
            Some(pool) => on_two_threads(pool, theirs, own),
        };
        let mut chunks: Vec<_> = mine.map_err(|e| write_error(partial, e))?.into_iter().collect();
        chunks.extend(theirs.map_err(|e| write_error(partial, e))?);
        chunks.sort_by_key(|c| c.0);
        if chunks.iter().enumerate().any(|(i, c)| c.0 != i) {
            return Err(write_error(partial, "the row group's column chunks do not match its columns"));
        }
        let mut rg = self.file.next_row_group().map_err(|e| write_error(partial, e))?;
        for (i, (bytes, close)) in chunks {
            rg.append_column(&bytes, close).map_err(|e| write_error(partial, e))?;
            // A plain column's buffer goes back for the next group's chunk.
            if matches!(i, TS | RAW | VALUE | STD) {
                if let (Some(slot), Ok(b)) = (self.buffers.get_mut(i), bytes.try_into_mut()) {
                    *slot = b.into();
                }
            }
        }
        rg.close().map_err(|e| write_error(partial, e))?;
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
