//! Long format (one row per sample: tag, time, value) in CSV and Parquet.
//!
//! Both readers feed a [`Collector`], which applies the stated rules of the
//! module documentation (skip other tags, sort, reject duplicate times,
//! count missing and non-finite values).

use std::cell::Cell;
use std::collections::BTreeSet;
use std::fs::File;
use std::io::BufReader;
use std::panic::AssertUnwindSafe;
use std::path::Path;
use std::sync::Once;

use arrow_array::cast::AsArray;
use arrow_array::{Array, RecordBatch};
use arrow_schema::DataType;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ProjectionMask;

use super::cols::{is_numeric, is_string, StrCol, TimeCol, ValueCol, TAG_TYPES, VALUE_TYPES};
use super::error::MAX_TAGS_LISTED;
use super::long_pq::find_column;
use super::time::TimeVal;
use super::{format_ts_us, ColumnMap, IoError, ReadStats, Result, TagSamples};
use crate::pipeline::EpochUnit;

const TAG: &str = "tag";
const TIME: &str = "time";
const VALUE: &str = "value";

/// The rows of one tag, gathered in file order.
struct Collector<'a> {
    path: &'a Path,
    tag: &'a str,
    ts: Vec<i64>,
    values: Vec<f64>,
    rows: Vec<u64>,
    stats: ReadStats,
    /// Distinct other tags, kept only until the tag is found (for the error
    /// that lists the tags present).
    others: BTreeSet<String>,
}

impl<'a> Collector<'a> {
    fn new(path: &'a Path, tag: &'a str) -> Self {
        Collector {
            path,
            tag,
            ts: Vec::new(),
            values: Vec::new(),
            rows: Vec::new(),
            stats: ReadStats::default(),
            others: BTreeSet::new(),
        }
    }

    /// Notes a tag other than the one wanted.
    fn see_other(&mut self, tag: &str) {
        if self.ts.is_empty() && !self.others.contains(tag) {
            self.others.insert(tag.to_string());
        }
    }

    /// Adds a sample of the tag; `value` None is an empty or null cell.
    fn push(&mut self, row: u64, ts: i64, value: Option<f64>) {
        if self.ts.is_empty() {
            self.others.clear();
        }
        if self.ts.last().is_some_and(|&last| ts < last) {
            self.stats.n_out_of_order += 1;
        }
        let v = match value {
            None => {
                self.stats.n_null += 1;
                f64::NAN
            }
            Some(v) if !v.is_finite() => {
                self.stats.n_non_finite += 1;
                f64::NAN
            }
            Some(v) => v,
        };
        self.ts.push(ts);
        self.values.push(v);
        self.rows.push(row);
    }

    /// Sorts by time (ties in row order), rejects duplicate times.
    fn finish(self, tag_column: &str) -> Result<TagSamples> {
        let path = self.path.to_path_buf();
        if self.ts.is_empty() {
            if self.stats.rows_read == 0 {
                return Err(IoError::Empty { path, what: "no data rows" });
            }
            return Err(IoError::TagNotFound {
                path,
                tag: self.tag.to_string(),
                column: tag_column.to_string(),
                n_present: self.others.len(),
                present: self.others.into_iter().take(MAX_TAGS_LISTED).collect(),
            });
        }
        let (ts, values, rows) = if self.stats.n_out_of_order == 0 {
            (self.ts, self.values, self.rows)
        } else {
            let mut order: Vec<usize> = (0..self.ts.len()).collect();
            // Stable: equal times keep file order, so a duplicate names its rows in order.
            order.sort_by_key(|&i| self.ts[i]);
            (
                order.iter().map(|&i| self.ts[i]).collect(),
                order.iter().map(|&i| self.values[i]).collect(),
                order.iter().map(|&i| self.rows[i]).collect::<Vec<u64>>(),
            )
        };
        if let Some(i) = ts.windows(2).position(|w| w[0] == w[1]) {
            let (a, b) = (rows[i], rows[i + 1]);
            return Err(IoError::DuplicateTime {
                path,
                tag: self.tag.to_string(),
                time: format_ts_us(ts[i]),
                first_row: a.min(b),
                second_row: a.max(b),
            });
        }
        Ok(TagSamples { tag: self.tag.to_string(), ts_us: ts, values, stats: self.stats })
    }
}

/// Opens a file, telling a missing file from one that cannot be read, and
/// rejects an empty one.
pub(super) fn open_file(path: &Path) -> Result<File> {
    let file = File::open(path).map_err(|source| {
        if source.kind() == std::io::ErrorKind::NotFound {
            IoError::NotFound { path: path.to_path_buf() }
        } else {
            IoError::Unreadable { path: path.to_path_buf(), source }
        }
    })?;
    let meta = file.metadata().map_err(|source| IoError::Unreadable { path: path.to_path_buf(), source })?;
    if meta.is_dir() {
        return Err(IoError::Unreadable {
            path: path.to_path_buf(),
            source: std::io::Error::other("it is a directory"),
        });
    }
    if meta.len() == 0 {
        return Err(IoError::Empty { path: path.to_path_buf(), what: "0 bytes" });
    }
    Ok(file)
}

// ---------------------------------------------------------------- CSV

/// Reads one tag from a CSV file with a header row.
pub(super) fn read_csv(path: &Path, tag: &str, columns: &ColumnMap) -> Result<TagSamples> {
    let file = open_file(path)?;
    let mut rdr = csv::ReaderBuilder::new().trim(csv::Trim::All).from_reader(BufReader::new(file));
    let headers = rdr.headers().map_err(|e| csv_error(path, e, None))?.clone();
    let find = |role: &'static str, name: &str| {
        headers.iter().position(|h| h == name).ok_or_else(|| IoError::MissingColumn {
            path: path.to_path_buf(),
            role,
            column: name.to_string(),
            available: headers.iter().map(str::to_string).collect(),
        })
    };
    let i_tag = find(TAG, &columns.tag)?;
    let i_time = find(TIME, &columns.time)?;
    let i_value = find(VALUE, &columns.value)?;

    let mut c = Collector::new(path, tag);
    let mut rec = csv::StringRecord::new();
    loop {
        match rdr.read_record(&mut rec) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => return Err(csv_error(path, e, Some(&headers))),
        }
        c.stats.rows_read += 1;
        // The header is row 1 and record 0.
        let row = rec.position().map_or(c.stats.rows_read + 1, |p| p.record() + 1);
        // The reader is not flexible: every record has the header's length.
        let t = rec.get(i_tag).unwrap_or("");
        if t != tag {
            c.see_other(t);
            continue;
        }
        let time_text = rec.get(i_time).unwrap_or("");
        let ts = parse_time_text(time_text).map_err(|reason| IoError::BadTime {
            path: path.to_path_buf(),
            row,
            column: columns.time.clone(),
            text: time_text.to_string(),
            reason,
        })?;
        let value_text = rec.get(i_value).unwrap_or("");
        let value = parse_value_text(value_text).ok_or_else(|| IoError::BadRow {
            path: path.to_path_buf(),
            row,
            column: Some(columns.value.clone()),
            reason: format!("value `{value_text}` is not a number"),
        })?;
        c.push(row, ts, value);
    }
    c.finish(&columns.tag)
}

/// A csv crate error with the file, row and (where known) column.
pub(super) fn csv_error(path: &Path, err: csv::Error, headers: Option<&csv::StringRecord>) -> IoError {
    let row_of = |pos: Option<&csv::Position>| pos.map_or(0, |p| p.record() + 1);
    let row = row_of(err.position());
    match err.into_kind() {
        csv::ErrorKind::Io(source) => IoError::Unreadable { path: path.to_path_buf(), source },
        csv::ErrorKind::Utf8 { err, .. } => IoError::BadRow {
            path: path.to_path_buf(),
            row,
            column: headers.and_then(|h| h.get(err.field()).map(str::to_string)),
            reason: format!(
                "not valid UTF-8 (after {} bytes of field {}); save the file as UTF-8",
                err.valid_up_to(),
                err.field() + 1
            ),
        },
        csv::ErrorKind::UnequalLengths { expected_len, len, .. } => IoError::BadRow {
            path: path.to_path_buf(),
            row,
            column: None,
            reason: format!("has {len} fields where the header has {expected_len}"),
        },
        other => IoError::BadRow { path: path.to_path_buf(), row, column: None, reason: format!("{other:?}") },
    }
}

/// A CSV value: empty is missing (`None`); `NaN`, `nan`, `inf` and the like
/// parse to non-finite numbers, which the collector counts. `None` from the
/// outer option: not a number.
pub(super) fn parse_value_text(s: &str) -> Option<Option<f64>> {
    if s.is_empty() {
        return Some(None);
    }
    s.parse::<f64>().ok().map(Some)
}

/// A CSV time to microseconds UTC (see the module documentation): as
/// [`super::time::parse_time_text`] with integers as epoch seconds, and a
/// naive time read as UTC.
pub(super) fn parse_time_text(s: &str) -> std::result::Result<i64, String> {
    match super::time::parse_time_text(s, EpochUnit::Seconds) {
        Ok(TimeVal::Instant(t) | TimeVal::Local(t)) => Ok(t),
        Err(e) if e == super::time::TIME_FORMS => Err(TIME_FORMS.to_string()),
        Err(e) => Err(e),
    }
}

const TIME_FORMS: &str = "expected RFC 3339 such as 2026-03-01T06:00:05Z or 2026-03-01T07:00:05+01:00, a date and time without offset (read as UTC) such as 2026-03-01 06:00:05, or whole epoch seconds";

// ---------------------------------------------------------------- Parquet

const TIME_TYPES: &str = "a timestamp (any unit, with or without time zone) or an Int64/Int32 of epoch seconds";

/// Reads one tag from a Parquet file, decoding only the three columns needed.
///
/// The Parquet decoder can panic on some damaged files (parquet 60 asserts
/// on negative column-chunk offsets in the footer, for example); such a
/// panic is caught and reported as [`IoError::CorruptParquet`], and its
/// message is kept out of stderr (see [`quiet_panics`]).
pub(super) fn read_parquet(path: &Path, tag: &str, columns: &ColumnMap) -> Result<TagSamples> {
    quiet_panics(|| read_parquet_unguarded(path, tag, columns)).unwrap_or_else(|message| {
        Err(IoError::CorruptParquet {
            path: path.to_path_buf(),
            source: format!("the Parquet decoder failed: {message}").into(),
        })
    })
}

thread_local! {
    /// True while this thread runs inside [`quiet_panics`].
    static QUIET: Cell<bool> = const { Cell::new(false) };
}

/// Runs `f`, turning a panic into `Err(message)`. While `f` runs, the
/// process panic hook stays silent on this thread: a wrapper hook (installed
/// once, delegating to the hook that was there before) skips panics raised
/// inside. Other threads and later panics are reported as usual.
pub(super) fn quiet_panics<T>(f: impl FnOnce() -> T) -> std::result::Result<T, String> {
    static HOOK: Once = Once::new();
    HOOK.call_once(|| {
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            if !QUIET.with(Cell::get) {
                previous(info);
            }
        }));
    });
    let was = QUIET.with(|q| q.replace(true));
    let out = std::panic::catch_unwind(AssertUnwindSafe(f));
    QUIET.with(|q| q.set(was));
    out.map_err(|payload| {
        payload
            .downcast_ref::<&str>()
            .map(|s| s.to_string())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "panic without a message".to_string())
    })
}

fn read_parquet_unguarded(path: &Path, tag: &str, columns: &ColumnMap) -> Result<TagSamples> {
    let corrupt =
        |e: Box<dyn std::error::Error + Send + Sync>| IoError::CorruptParquet { path: path.to_path_buf(), source: e };
    let file = open_file(path)?;
    let builder = ParquetRecordBatchReaderBuilder::try_new(file).map_err(|e| corrupt(e.into()))?;
    let schema = builder.schema().clone();
    let find =
        |role, name: &str, ok: fn(&DataType) -> bool, expected| find_column(path, &schema, role, name, ok, expected);
    let i_tag = find(
        TAG,
        &columns.tag,
        |t| match t {
            DataType::Dictionary(_, v) => is_string(v),
            t => is_string(t),
        },
        TAG_TYPES,
    )?;
    let i_time = find(
        TIME,
        &columns.time,
        |t| matches!(t, DataType::Timestamp(..) | DataType::Int64 | DataType::Int32),
        TIME_TYPES,
    )?;
    let i_value = find(VALUE, &columns.value, is_numeric, VALUE_TYPES)?;

    // Top-level Arrow fields are the Parquet schema's root columns, in order.
    let mask = ProjectionMask::roots(builder.parquet_schema(), [i_tag, i_time, i_value]);
    let reader = builder.with_projection(mask).build().map_err(|e| corrupt(e.into()))?;

    let mut c = Collector::new(path, tag);
    for batch in reader {
        let batch = batch.map_err(|e| corrupt(e.into()))?;
        read_batch(&mut c, &batch, columns)?;
    }
    c.finish(&columns.tag)
}

/// Adds one record batch's rows of the tag to the collector.
fn read_batch(c: &mut Collector, batch: &RecordBatch, columns: &ColumnMap) -> Result<()> {
    let path = c.path;
    let base = c.stats.rows_read;
    let n = batch.num_rows();
    c.stats.rows_read += n as u64;
    let column = |role: &'static str, name: &str, expected: &'static str| {
        batch.column_by_name(name).ok_or_else(|| IoError::ColumnType {
            path: path.to_path_buf(),
            role,
            column: name.to_string(),
            found: "a column the reader did not return".to_string(),
            expected,
        })
    };
    let tag_col = column(TAG, &columns.tag, TAG_TYPES)?.clone();
    let time_col = column(TIME, &columns.time, TIME_TYPES)?.clone();
    let value_col = column(VALUE, &columns.value, VALUE_TYPES)?.clone();
    let type_error = |role, col: &dyn Array, name: &str, expected| IoError::ColumnType {
        path: path.to_path_buf(),
        role,
        column: name.to_string(),
        found: col.data_type().to_string(),
        expected,
    };
    let matches =
        tag_matches(c, tag_col.as_ref()).ok_or_else(|| type_error(TAG, tag_col.as_ref(), &columns.tag, TAG_TYPES))?;
    let times = TimeCol::new(time_col.as_ref(), EpochUnit::Seconds)
        .ok_or_else(|| type_error(TIME, time_col.as_ref(), &columns.time, TIME_TYPES))?;
    let values = ValueCol::new(value_col.as_ref())
        .ok_or_else(|| type_error(VALUE, value_col.as_ref(), &columns.value, VALUE_TYPES))?;
    for (i, _) in matches.iter().enumerate().filter(|(_, m)| **m) {
        let row = base + i as u64 + 1;
        let ts = match times.micros(i) {
            Ok(Some(ts)) => ts,
            Ok(None) => {
                return Err(IoError::BadTime {
                    path: path.to_path_buf(),
                    row,
                    column: columns.time.clone(),
                    text: "null".to_string(),
                    reason: "the time is null".to_string(),
                })
            }
            Err(raw) => {
                return Err(IoError::BadTime {
                    path: path.to_path_buf(),
                    row,
                    column: columns.time.clone(),
                    text: raw,
                    reason: "out of range (beyond i64 microseconds since 1970)".to_string(),
                })
            }
        };
        c.push(row, ts, values.get(i));
    }
    Ok(())
}

/// For each row, whether its tag is the wanted one; other tags are noted.
/// A null tag matches nothing. `None` if the column is not a string column.
fn tag_matches(c: &mut Collector, col: &dyn Array) -> Option<Vec<bool>> {
    if let Some(dict) = col.as_any_dictionary_opt() {
        // Compare each dictionary value once, then look rows up by key.
        let values = StrCol::new(dict.values().as_ref())?;
        if values.len() == 0 {
            return Some(vec![false; col.len()]);
        }
        let wanted: Vec<bool> = (0..values.len()).map(|j| values.get(j) == Some(c.tag)).collect();
        let mut seen = vec![false; values.len()];
        let keys = dict.normalized_keys();
        let out = (0..col.len())
            .map(|i| {
                if col.is_null(i) {
                    return false;
                }
                let k = keys[i];
                seen[k] |= !wanted[k];
                wanted[k]
            })
            .collect();
        for (j, _) in seen.iter().enumerate().filter(|(_, s)| **s) {
            if let Some(t) = values.get(j) {
                c.see_other(t);
            }
        }
        return Some(out);
    }
    let s = StrCol::new(col)?;
    let mut last_other: Option<&str> = None;
    let out = (0..s.len())
        .map(|i| match s.get(i) {
            Some(t) if t == c.tag => true,
            Some(t) => {
                if last_other != Some(t) {
                    c.see_other(t);
                    last_other = Some(t);
                }
                false
            }
            None => false,
        })
        .collect();
    Some(out)
}
