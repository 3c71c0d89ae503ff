//! The input of a run: every tag of a set of long- or wide-format files
//! (CSV or Parquet), read tag by tag under the stated rules of
//! `docs/input.md`.
//!
//! [`InputSet::open`] makes one pass over each file to learn which tags it
//! holds and where (for a long file the runs of consecutive rows of one
//! tag; for a wide file the tag columns). [`InputSet::read_tags`] then reads
//! only the asked tags:
//!
//! - a long Parquet file whose tags each sit in one run of rows (the usual
//!   export, sorted by tag) is read with a row selection covering only the
//!   runs asked, and only the time, value and quality columns are decoded;
//! - a long CSV file of that shape is read by seeking to the byte offset of
//!   each run asked;
//! - a wide Parquet file is read column by column (its time column is read
//!   once, when the file is opened);
//! - a long file whose tags are interleaved, and any wide CSV file, are read
//!   whole once, on the first call, and kept in memory (their rows are
//!   cached for the later calls). [`InputSet::is_streaming`] is false then.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::{Arc, Mutex};

use chrono_tz::Tz;
use sha2::{Digest, Sha256};

use super::long::open_file;
use super::time::{format_local, local_to_utc, FoldState, LocalResolver};
use super::{format_ts_us, long_csv, long_pq, wide, Format, IoError, Result};
use crate::pipeline::{DuplicateRule, InputFormat, InputSpec};
use crate::series::{Quality, ReadCounts, TagSeries};

/// How to read a set of input files.
#[derive(Debug, Clone, Copy)]
pub struct InputOptions<'a> {
    /// Layout, column names, epoch unit, quality coding, duplicate rule.
    pub spec: &'a InputSpec,
    /// The zone of naive (local) times.
    pub tz: Tz,
    /// Keep only rows with time in `[from, to)` (microseconds UTC); `None` keeps all.
    pub window: Option<(i64, i64)>,
}

/// One input file as recorded in provenance.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputFileInfo {
    pub path: PathBuf,
    /// SHA-256 of the file's bytes, lower-case hex.
    pub sha256: String,
    /// Data rows in the file (all tags; the header of a CSV file is not counted).
    pub rows: u64,
}

/// A set of input files, indexed by tag. See the module documentation.
///
/// `InputSet` is `Sync`: [`InputSet::read_tags`] may be called from several
/// threads (reads of cached files are serialised).
#[derive(Debug)]
pub struct InputSet {
    spec: InputSpec,
    tz: Tz,
    window: Option<(i64, i64)>,
    files: Vec<InputFileInfo>,
    sources: Vec<Source>,
    tags: Vec<String>,
    streaming: bool,
    /// Rows of the files read whole, per file.
    cache: Mutex<Vec<Option<Arc<FileRows>>>>,
    hashing: Hashing,
}

/// The SHA-256 of the input files, computed one file after the other on a
/// thread of its own (a file's hash is one sequential pass over its bytes,
/// which need not hold up the reading).
#[derive(Debug)]
struct Hashing {
    job: Option<std::thread::JoinHandle<Vec<Result<String>>>>,
    /// The results, when they were computed on the caller's thread.
    ready: Option<Vec<Result<String>>>,
    /// Set when the input set is dropped first: the thread stops early.
    stop: Arc<AtomicBool>,
}

impl Hashing {
    fn start(paths: &[PathBuf]) -> Hashing {
        let stop = Arc::new(AtomicBool::new(false));
        let (owned, flag) = (paths.to_vec(), stop.clone());
        let hash_all = move || owned.iter().map(|p| sha256_file(p, &flag)).collect::<Vec<_>>();
        match std::thread::Builder::new().name("tagwright-hash".into()).spawn(hash_all) {
            Ok(job) => Hashing { job: Some(job), ready: None, stop },
            // No thread to be had: hash here and now.
            Err(_) => {
                let ready = paths.iter().map(|p| sha256_file(p, &stop)).collect();
                Hashing { job: None, ready: Some(ready), stop }
            }
        }
    }

    /// The hashes, in file order; `None` after the first call.
    fn finish(&mut self) -> Option<Vec<Result<String>>> {
        if let Some(job) = self.job.take() {
            return Some(job.join().unwrap_or_else(|_| {
                vec![Err(IoError::Unreadable {
                    path: PathBuf::from("input"),
                    source: std::io::Error::other("hashing the input files failed"),
                })]
            }));
        }
        self.ready.take()
    }
}

impl Drop for Hashing {
    fn drop(&mut self) {
        self.stop.store(true, std::sync::atomic::Ordering::Relaxed);
    }
}

/// The rows of a file read whole: tag id to its rows.
type FileRows = HashMap<u32, Chunk>;

/// A run of consecutive rows of one tag in a long file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) struct Run {
    /// Tag id: file-local during the first pass, global afterwards.
    pub tag: u32,
    /// First row, 0-based (Parquet: data row; CSV: record number, the header being record 0).
    pub start: u64,
    pub len: u64,
}

impl Run {
    pub(super) fn end(&self) -> u64 {
        self.start + self.len
    }
}

/// What the first pass learned of a long file.
#[derive(Debug, Default)]
pub(super) struct LongIndex {
    /// Tag names, by file-local id.
    pub names: Vec<String>,
    /// Runs in file order.
    pub runs: Vec<Run>,
    ids: HashMap<String, u32>,
}

impl LongIndex {
    /// Adds row `row` of tag `tag` (rows come in file order).
    pub(super) fn push(&mut self, tag: &str, row: u64) {
        if let Some(last) = self.runs.last_mut() {
            if last.end() == row && self.names.get(last.tag as usize).is_some_and(|n| n == tag) {
                last.len += 1;
                return;
            }
        }
        let id = match self.ids.get(tag) {
            Some(&id) => id,
            None => {
                let id = self.names.len() as u32;
                self.names.push(tag.to_string());
                self.ids.insert(tag.to_string(), id);
                id
            }
        };
        self.runs.push(Run { tag: id, start: row, len: 1 });
    }

    /// Adds `n` more rows to the last run (the caller knows the tag is the same).
    pub(super) fn extend_last(&mut self, n: usize) {
        if let Some(last) = self.runs.last_mut() {
            last.len += n as u64;
        }
    }
}

/// Rows of one tag from one file, in file order, before the reading rules.
#[derive(Debug, Clone, Default)]
pub(super) struct Chunk {
    /// Microseconds: UTC, or on the local clock where `local` says so.
    pub ts: Vec<i64>,
    /// Per row: the time is a local time. Empty when no row is local.
    pub local: Vec<bool>,
    /// The value; NaN where null, empty or not finite.
    pub value: Vec<f64>,
    pub quality: Vec<Quality>,
    /// Row numbers as the errors show them (1-based; CSV header is row 1).
    pub row: RowNumbers,
    /// The time order and non-finite count of the rows appended so far
    /// through [`Chunk::scan_appended`], counted while those rows were
    /// still in cache.
    scan: Scan,
}

/// What [`Chunk::scan_appended`] counted.
#[derive(Debug, Clone, Copy, Default)]
struct Scan {
    /// Rows counted (from the first); the counts stand for the chunk only
    /// when this is all of its rows.
    rows: usize,
    order: Order,
    non_finite: usize,
}

/// The file row numbers of a chunk's rows, kept as runs of consecutive
/// numbers: a tag's rows are mostly one stretch of the file, and only an
/// error message asks for a row number.
#[derive(Debug, Clone, Default)]
pub(super) struct RowNumbers {
    /// (index of the run's first row in the chunk, its row number), by index.
    runs: Vec<(usize, u64)>,
}

impl RowNumbers {
    /// Numbers rows `at..at + len` of the chunk `first..first + len`.
    pub(super) fn push_run(&mut self, at: usize, first: u64, len: usize) {
        if len == 0 {
            return;
        }
        if let Some(&(a, r)) = self.runs.last() {
            if r + (at - a) as u64 == first {
                return;
            }
        }
        self.runs.push((at, first));
    }

    /// The row number of the chunk's row `i`.
    pub(super) fn get(&self, i: usize) -> u64 {
        let k = self.runs.partition_point(|&(a, _)| a <= i);
        self.runs.get(k.wrapping_sub(1)).map_or(0, |&(a, r)| r + (i - a) as u64)
    }
}

impl Chunk {
    pub(super) fn with_capacity(n: usize) -> Self {
        Chunk {
            ts: Vec::with_capacity(n),
            local: Vec::new(),
            value: Vec::with_capacity(n),
            quality: Vec::with_capacity(n),
            row: RowNumbers::default(),
            scan: Scan::default(),
        }
    }

    /// Counts the time order and the non-finite values of the rows from
    /// `from` on, just appended (in cache: the chunk is read again later
    /// only when these counts do not cover it).
    pub(super) fn scan_appended(&mut self, from: usize) {
        if self.scan.rows != from || from > self.ts.len() || self.value.len() != self.ts.len() {
            return;
        }
        // (With the last row before them, for the seam.)
        let o = Order::of(&self.ts[from.saturating_sub(1)..]);
        self.scan.order.back += o.back;
        self.scan.order.repeats += o.repeats;
        self.scan.non_finite += self.value[from..].iter().filter(|v| !v.is_finite()).count();
        self.scan.rows = self.ts.len();
    }

    /// [`Chunk::scan_appended`]'s counts when they cover every row.
    fn scanned(&self) -> Option<Scan> {
        (self.scan.rows == self.ts.len()).then_some(self.scan)
    }

    pub(super) fn push(&mut self, ts: i64, local: bool, value: f64, quality: Quality, row: u64) {
        self.note_local(local, 1);
        self.row.push_run(self.ts.len(), row, 1);
        self.ts.push(ts);
        self.value.push(value);
        self.quality.push(quality);
    }

    pub(super) fn len(&self) -> usize {
        self.ts.len()
    }

    fn is_local(&self, i: usize) -> bool {
        self.local.get(i).copied().unwrap_or(false)
    }

    /// Records that `n` rows about to be added have local times (or not).
    pub(super) fn note_local(&mut self, local: bool, n: usize) {
        if local && self.local.len() < self.ts.len() {
            self.local.resize(self.ts.len(), false);
        }
        if local || !self.local.is_empty() {
            self.local.extend(std::iter::repeat_n(local, n));
        }
    }

    /// The rows whose (UTC) time passes `keep`; local flags are dropped
    /// (called after conversion).
    fn filter(self, keep: impl Fn(i64) -> bool) -> Chunk {
        let mut out = Chunk::with_capacity(self.len());
        for i in 0..self.len() {
            if keep(self.ts[i]) {
                out.row.push_run(out.ts.len(), self.row.get(i), 1);
                out.ts.push(self.ts[i]);
                out.value.push(self.value[i]);
                out.quality.push(self.quality[i]);
            }
        }
        out
    }
}

/// How a run of times is ordered: steps back, and times equal to the one
/// before.
#[derive(Debug, Clone, Copy, Default)]
struct Order {
    back: usize,
    repeats: usize,
}

impl Order {
    fn of(ts: &[i64]) -> Order {
        let (mut back, mut repeats) = (0usize, 0usize);
        for (a, b) in ts.iter().zip(ts.iter().skip(1)) {
            back += usize::from(b < a);
            repeats += usize::from(b == a);
        }
        Order { back, repeats }
    }

    /// The earliest and latest of `ts` (the ends, when nothing steps back).
    fn range(&self, ts: &[i64]) -> (i64, i64) {
        match (ts.first(), ts.last()) {
            (Some(&a), Some(&b)) if self.back == 0 => (a, b),
            _ => ts.iter().fold((i64::MAX, i64::MIN), |(lo, hi), &t| (lo.min(t), hi.max(t))),
        }
    }
}

/// How one file is read.
#[derive(Debug)]
enum Source {
    Long {
        reader: LongReader,
        /// Runs in file order, global tag ids.
        runs: Vec<Run>,
        /// Run indices of each tag.
        by_tag: HashMap<u32, Vec<usize>>,
        /// Every tag is one run.
        contiguous: bool,
    },
    WideParquet {
        reader: wide::WideParquet,
        /// Global tag id to root column index.
        columns: HashMap<u32, usize>,
    },
    /// Read whole when opened; its rows are in the cache.
    WideCsv,
}

#[derive(Debug)]
pub(super) enum LongReader {
    Parquet(long_pq::ParquetLong),
    Csv(long_csv::CsvLong),
}

impl LongReader {
    fn read(&self, path: &Path, spec: &InputSpec, runs: &[Run], selected: &[usize]) -> Result<HashMap<u32, Chunk>> {
        match self {
            LongReader::Parquet(r) => r.read(path, spec, runs, selected),
            LongReader::Csv(r) => r.read(path, spec, runs, selected),
        }
    }
}

/// A file's size and modification time, to notice a file changed between
/// the first pass and a read.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) struct Stamp {
    len: u64,
    modified: Option<std::time::SystemTime>,
}

impl Stamp {
    pub(super) fn of(file: &std::fs::File, path: &Path) -> Result<Stamp> {
        let m = file.metadata().map_err(|source| IoError::Unreadable { path: path.to_path_buf(), source })?;
        Ok(Stamp { len: m.len(), modified: m.modified().ok() })
    }

    /// Opens the file again for a read, checking it has not changed.
    pub(super) fn reopen(&self, path: &Path) -> Result<std::fs::File> {
        let f = open_file(path)?;
        if Stamp::of(&f, path)? != *self {
            return Err(IoError::Unreadable {
                path: path.to_path_buf(),
                source: std::io::Error::other("the file changed after it was opened; run again on a finished file"),
            });
        }
        Ok(f)
    }
}

impl InputSet {
    /// Opens the files: checks their layout and column types, hashes them,
    /// and indexes which tags each holds and where (the first pass). Times,
    /// values and quality of long files are read by [`InputSet::read_tags`];
    /// a wide file's time column is read here.
    pub fn open(paths: &[PathBuf], opts: InputOptions) -> Result<InputSet> {
        let mut set = Self::open_hashing_aside(paths, opts)?;
        set.finish_hashing()?;
        Ok(set)
    }

    /// As [`InputSet::open`], with the files' SHA-256 computed on a thread
    /// of their own while the caller goes on reading: their `sha256` in
    /// [`InputSet::files`] is empty until [`InputSet::finish_hashing`].
    pub fn open_hashing_aside(paths: &[PathBuf], opts: InputOptions) -> Result<InputSet> {
        if paths.is_empty() {
            return Err(IoError::BadInputList { path: PathBuf::from("input"), reason: "no input file given".into() });
        }
        let mut seen: HashMap<PathBuf, &PathBuf> = HashMap::new();
        for p in paths {
            if let Ok(c) = std::fs::canonicalize(p) {
                if let Some(first) = seen.insert(c, p) {
                    return Err(IoError::BadInputList {
                        path: p.clone(),
                        reason: format!("the same file is given twice (also as {})", first.display()),
                    });
                }
            }
        }

        let spec = opts.spec;
        let mut resolver = LocalResolver::new(opts.tz);
        let mut wide_fold = FoldState::default();
        let mut files = Vec::with_capacity(paths.len());
        let mut opened: Vec<Opened> = Vec::with_capacity(paths.len());
        for path in paths {
            Format::from_path(path)?;
        }
        let hashing = Hashing::start(paths);
        for path in paths {
            let format = Format::from_path(path)?;
            let index = match (spec.format, format) {
                (InputFormat::Long, Format::Parquet) => {
                    long_pq::open(path, spec).map(|(r, ix, rows)| (Opened::Long(LongReader::Parquet(r), ix), rows))
                }
                (InputFormat::Long, Format::Csv) => {
                    long_csv::open(path, spec).map(|(r, ix, rows)| (Opened::Long(LongReader::Csv(r), ix), rows))
                }
                (InputFormat::Wide, Format::Parquet) => wide::open_parquet(path, spec, &mut resolver, &mut wide_fold)
                    .map(|(r, rows)| (Opened::WideParquet(r), rows)),
                (InputFormat::Wide, Format::Csv) => wide::read_csv(path, spec, &mut resolver, &mut wide_fold)
                    .map(|(names, chunks, rows)| (Opened::WideCsv(names, chunks), rows)),
            };
            let (o, rows) = index?;
            files.push(InputFileInfo { path: path.clone(), sha256: String::new(), rows });
            opened.push(o);
        }

        // Global tag ids: the sorted union of every file's tags.
        let mut all: BTreeSet<&str> = BTreeSet::new();
        for o in &opened {
            all.extend(o.names().iter().map(String::as_str));
        }
        let tags: Vec<String> = all.into_iter().map(str::to_string).collect();
        let id_of = |name: &str| tags.binary_search_by(|t| t.as_str().cmp(name)).ok().map(|i| i as u32);

        let mut sources = Vec::with_capacity(opened.len());
        let mut cache = Vec::with_capacity(opened.len());
        for o in opened {
            let global: Vec<u32> = o.names().iter().filter_map(|n| id_of(n)).collect();
            let g = |local: u32| global.get(local as usize).copied().unwrap_or(u32::MAX);
            match o {
                Opened::Long(reader, ix) => {
                    let runs: Vec<Run> = ix.runs.iter().map(|r| Run { tag: g(r.tag), ..*r }).collect();
                    let mut by_tag: HashMap<u32, Vec<usize>> = HashMap::new();
                    for (i, r) in runs.iter().enumerate() {
                        by_tag.entry(r.tag).or_default().push(i);
                    }
                    let contiguous = by_tag.values().all(|v| v.len() == 1);
                    sources.push(Source::Long { reader, runs, by_tag, contiguous });
                    cache.push(None);
                }
                Opened::WideParquet(reader) => {
                    let columns = reader.roots().iter().enumerate().map(|(i, &c)| (g(i as u32), c)).collect();
                    sources.push(Source::WideParquet { reader, columns });
                    cache.push(None);
                }
                Opened::WideCsv(_, chunks) => {
                    let chunks: HashMap<u32, Chunk> = chunks.into_iter().map(|(local, c)| (g(local), c)).collect();
                    sources.push(Source::WideCsv);
                    cache.push(Some(Arc::new(chunks)));
                }
            }
        }
        let streaming = sources.iter().all(|s| match s {
            Source::Long { contiguous, .. } => *contiguous,
            Source::WideParquet { .. } => true,
            Source::WideCsv => false,
        });
        Ok(InputSet {
            spec: spec.clone(),
            tz: opts.tz,
            window: opts.window,
            files,
            sources,
            tags,
            streaming,
            cache: Mutex::new(cache),
            hashing,
        })
    }

    /// Waits for the files' SHA-256 (see [`InputSet::open_hashing_aside`])
    /// and records them in [`InputSet::files`]; does nothing the second time.
    pub fn finish_hashing(&mut self) -> Result<()> {
        let Some(hashes) = self.hashing.finish() else { return Ok(()) };
        for (f, h) in self.files.iter_mut().zip(hashes) {
            f.sha256 = h?;
        }
        Ok(())
    }

    /// Every tag in the input, sorted (byte order), each once. A tag with no
    /// row in the window is listed too.
    pub fn tags(&self) -> &[String] {
        &self.tags
    }

    /// True when every file can be read tag by tag without holding the
    /// whole file: long files whose tags each sit in one run of rows, and
    /// wide Parquet files. False when some file is read whole and cached.
    pub fn is_streaming(&self) -> bool {
        self.streaming
    }

    /// The files, in the order given.
    pub fn files(&self) -> &[InputFileInfo] {
        &self.files
    }

    /// Reads the asked tags (in the order asked), merging the files in the
    /// order given, under the reading rules: local times to UTC, window,
    /// sort, duplicates, non-finite values. A tag that no file holds is an
    /// error.
    pub fn read_tags(&self, tags: &[String]) -> Result<Vec<TagSeries>> {
        let mut ids = Vec::with_capacity(tags.len());
        for t in tags {
            match self.tags.binary_search(t) {
                Ok(i) => ids.push(i as u32),
                Err(_) => return Err(IoError::TagNotInInput { tag: t.clone(), n_files: self.files.len() }),
            }
        }
        let wanted: BTreeSet<u32> = ids.iter().copied().collect();
        let mut parts: HashMap<u32, Vec<(usize, Chunk)>> = HashMap::new();
        for (f, source) in self.sources.iter().enumerate() {
            let path = &self.files[f].path;
            let read = match source {
                Source::Long { reader, runs, by_tag, contiguous: true } => {
                    let mut selected: Vec<usize> =
                        wanted.iter().filter_map(|id| by_tag.get(id)).flatten().copied().collect();
                    if selected.is_empty() {
                        continue;
                    }
                    selected.sort_unstable_by_key(|&i| runs[i].start);
                    reader.read(path, &self.spec, runs, &selected)?
                }
                Source::WideParquet { reader, columns } => {
                    let cols: Vec<(u32, usize)> =
                        wanted.iter().filter_map(|id| columns.get(id).map(|&c| (*id, c))).collect();
                    if cols.is_empty() {
                        continue;
                    }
                    reader.read(path, &cols)?
                }
                Source::Long { contiguous: false, .. } | Source::WideCsv => {
                    let cached = self.cached(f)?;
                    wanted.iter().filter_map(|id| cached.get(id).map(|c| (*id, c.clone()))).collect()
                }
            };
            for (id, chunk) in read {
                parts.entry(id).or_default().push((f, chunk));
            }
        }
        let mut done: HashMap<u32, TagSeries> = HashMap::with_capacity(wanted.len());
        for &id in &wanted {
            let chunks = parts.remove(&id).unwrap_or_default();
            let name = self.tags.get(id as usize).cloned().unwrap_or_default();
            done.insert(id, self.finish_tag(name, chunks)?);
        }
        // In the order asked; a tag asked twice is returned twice.
        let mut left: HashMap<u32, usize> = HashMap::new();
        for &id in &ids {
            *left.entry(id).or_default() += 1;
        }
        let mut out = Vec::with_capacity(ids.len());
        for id in ids {
            let n = left.entry(id).or_default();
            *n = n.saturating_sub(1);
            let s = if *n == 0 { done.remove(&id) } else { done.get(&id).cloned() };
            if let Some(s) = s {
                out.push(s);
            }
        }
        Ok(out)
    }

    /// The rows of a file that is read whole, reading it on first use.
    fn cached(&self, f: usize) -> Result<Arc<FileRows>> {
        let mut cache = self.cache.lock().unwrap_or_else(|p| p.into_inner());
        if let Some(Some(c)) = cache.get(f) {
            return Ok(c.clone());
        }
        let Some(Source::Long { reader, runs, .. }) = self.sources.get(f) else {
            return Err(IoError::Unreadable {
                path: self.files.get(f).map(|i| i.path.clone()).unwrap_or_default(),
                source: std::io::Error::other("internal: no cached rows for this file"),
            });
        };
        let all: Vec<usize> = (0..runs.len()).collect();
        let chunks = Arc::new(reader.read(&self.files[f].path, &self.spec, runs, &all)?);
        if let Some(slot) = cache.get_mut(f) {
            *slot = Some(chunks.clone());
        }
        Ok(chunks)
    }

    /// Applies the reading rules to one tag's rows (chunks in file order).
    fn finish_tag(&self, tag: String, chunks: Vec<(usize, Chunk)>) -> Result<TagSeries> {
        // (file, row) of each kept row: only the `error` duplicate rule names them.
        let want_origin = self.spec.duplicates == DuplicateRule::Error;
        let mut origin: Vec<(u32, u64)> = Vec::new();
        let mut ts: Vec<i64> = Vec::new();
        let mut values: Vec<f64> = Vec::new();
        let mut quality: Vec<Quality> = Vec::new();
        let mut counts = ReadCounts::default();
        let mut resolver = LocalResolver::new(self.tz);
        let mut fold = FoldState::default();
        let (mut sorted, mut repeats) = (true, false);
        for (f, mut c) in chunks {
            // The counts taken as the rows were read, when they cover the chunk.
            let scanned = c.scanned();
            // Local times to UTC, in file order (the daylight-saving rule follows the rows).
            if !c.local.is_empty() {
                for i in 0..c.len() {
                    if c.is_local(i) {
                        c.ts[i] =
                            local_to_utc(&mut resolver, &mut fold, c.ts[i]).map_err(|reason| IoError::BadTime {
                                path: self.files[f].path.clone(),
                                row: c.row.get(i),
                                column: self.spec.columns.time.clone(),
                                text: format_local(c.ts[i]),
                                reason,
                            })?;
                    }
                }
            }
            // One pass over the times finds the steps back and the repeats
            // (none when they were counted as the rows were read and no
            // local time has changed since).
            let mut order = match scanned {
                Some(s) if c.local.is_empty() => s.order,
                _ => Order::of(&c.ts),
            };
            let mut filtered = false;
            if let Some((from, to)) = self.window {
                let (lo, hi) = order.range(&c.ts);
                if lo < from || hi >= to {
                    c = c.filter(|t| t >= from && t < to);
                    order = Order::of(&c.ts);
                    filtered = true;
                }
            }
            counts.rows += c.len();
            counts.out_of_order += order.back;
            // (Counted first, without writing: most chunks hold none; where
            // some are, every reading is written through a select, with no
            // branch per reading.)
            let non_finite = match scanned {
                Some(s) if !filtered => s.non_finite,
                _ => c.value.iter().filter(|v| !v.is_finite()).count(),
            };
            if non_finite > 0 {
                counts.non_finite += non_finite;
                for (v, q) in c.value.iter_mut().zip(c.quality.iter_mut()) {
                    let bad = !v.is_finite();
                    *q = if bad { Quality::Bad } else { *q };
                    *v = if bad { f64::NAN } else { *v };
                }
            }
            if want_origin {
                origin.extend((0..c.len()).map(|i| (f as u32, c.row.get(i))));
            }
            // The whole series so far is in order (and has a repeat) when
            // each chunk is and the seam between them is.
            if let (Some(&prev), Some(&first)) = (ts.last(), c.ts.first()) {
                sorted &= first >= prev;
                repeats |= first == prev;
            }
            sorted &= order.back == 0;
            repeats |= order.repeats > 0;
            if ts.is_empty() {
                (ts, values, quality) = (c.ts, c.value, c.quality);
            } else {
                ts.extend_from_slice(&c.ts);
                values.extend_from_slice(&c.value);
                quality.extend_from_slice(&c.quality);
            }
        }
        if !sorted {
            let mut order: Vec<usize> = (0..ts.len()).collect();
            // Stable: equal times keep input order (files as given, rows in file order).
            order.sort_by_key(|&i| ts[i]);
            ts = order.iter().map(|&i| ts[i]).collect();
            values = order.iter().map(|&i| values[i]).collect();
            quality = order.iter().map(|&i| quality[i]).collect();
            if want_origin {
                origin = order.iter().map(|&i| origin[i]).collect();
            }
        }
        if !sorted {
            repeats = ts.windows(2).any(|w| w[1] == w[0]);
        }
        if repeats {
            self.drop_duplicates(&tag, &mut ts, &mut values, &mut quality, &origin, &mut counts)?;
        }
        Ok(TagSeries { tag, ts_us: ts, values, quality, counts })
    }

    /// Keeps one sample per time (best quality, then the last in input
    /// order), or stops under the `error` rule.
    fn drop_duplicates(
        &self,
        tag: &str,
        ts: &mut Vec<i64>,
        values: &mut Vec<f64>,
        quality: &mut Vec<Quality>,
        origin: &[(u32, u64)],
        counts: &mut ReadCounts,
    ) -> Result<()> {
        let n = ts.len();
        let mut keep = Vec::with_capacity(n);
        let mut i = 0;
        while i < n {
            let mut j = i + 1;
            while j < n && ts[j] == ts[i] {
                j += 1;
            }
            if j - i > 1 && self.spec.duplicates == DuplicateRule::Error {
                let (fa, ra) = origin[i];
                let (fb, rb) = origin[i + 1];
                let pa = self.files[fa as usize].path.clone();
                let time = format_ts_us(ts[i]);
                return Err(if fa == fb {
                    IoError::DuplicateTime {
                        path: pa,
                        tag: tag.to_string(),
                        time,
                        first_row: ra.min(rb),
                        second_row: ra.max(rb),
                    }
                } else {
                    IoError::DuplicateTimeAcross {
                        tag: tag.to_string(),
                        time,
                        first_path: pa,
                        first_row: ra,
                        second_path: self.files[fb as usize].path.clone(),
                        second_row: rb,
                    }
                });
            }
            // Best quality (Good < Uncertain < Bad), the last among equals.
            let mut best = i;
            for k in i + 1..j {
                if quality[k] <= quality[best] {
                    best = k;
                }
            }
            keep.push(best);
            counts.duplicates += j - i - 1;
            i = j;
        }
        *ts = keep.iter().map(|&k| ts[k]).collect();
        *values = keep.iter().map(|&k| values[k]).collect();
        *quality = keep.iter().map(|&k| quality[k]).collect();
        Ok(())
    }
}

/// A file after the first pass, before global tag ids.
enum Opened {
    Long(LongReader, LongIndex),
    WideParquet(wide::WideParquet),
    WideCsv(Vec<String>, HashMap<u32, Chunk>),
}

impl Opened {
    fn names(&self) -> &[String] {
        match self {
            Opened::Long(_, ix) => &ix.names,
            Opened::WideParquet(r) => r.names(),
            Opened::WideCsv(names, _) => names,
        }
    }
}

/// SHA-256 of a file's bytes, lower-case hex.
/// The SHA-256 of a file, lower-case hex (an error once `stop` is set).
fn sha256_file(path: &Path, stop: &AtomicBool) -> Result<String> {
    use std::io::Read;
    let mut f = open_file(path)?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    loop {
        if stop.load(std::sync::atomic::Ordering::Relaxed) {
            let source = std::io::Error::other("hashing stopped");
            return Err(IoError::Unreadable { path: path.to_path_buf(), source });
        }
        match f.read(&mut buf) {
            Ok(0) => break,
            Ok(k) => h.update(&buf[..k]),
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(source) => return Err(IoError::Unreadable { path: path.to_path_buf(), source }),
        }
    }
    Ok(hex::encode(h.finalize()))
}

#[cfg(test)]
#[path = "input_tests.rs"]
mod tests;
