//! Wide-format input: one time column, one column per tag (named by the
//! column). The time column is read when the file is opened (local times
//! converted once, under the daylight-saving rule applied to the rows of
//! the file). Every value is of good quality; an empty or null cell means
//! the tag has no sample at that time.
//!
//! - Parquet: every numeric (or Boolean) column other than the time column
//!   is a tag; columns of other types (text, for example) are not tags and
//!   are skipped. Only the asked tags' columns are decoded.
//! - CSV: a column whose first non-empty cell is a number is a tag, and a
//!   later cell that is not a number is then an error naming the row and
//!   column; a column whose first non-empty cell is text is not a tag and is
//!   skipped; a column with no value at all is a tag without samples. The
//!   whole file is read when it is opened.
//!
//! In both, a column without a name or a name used twice is an error.

use std::collections::{HashMap, HashSet};
use std::io::BufReader;
use std::path::Path;

use arrow_schema::Schema;
use parquet::arrow::arrow_reader::{ArrowReaderMetadata, ParquetRecordBatchReaderBuilder};
use parquet::arrow::ProjectionMask;

use super::cols::{is_numeric, is_time, TimeCol, ValueCol, TIME_TYPES, VALUE_TYPES};
use super::input::{Chunk, Stamp};
use super::long::{csv_error, open_file, parse_value_text};
use super::long_csv::{csv_reader, find_header};
use super::long_pq::{bad_row, bad_time, corrupt, find_column, guarded, load};
use super::time::{format_local, local_to_utc, parse_time_text, FoldState, LocalResolver, TimeVal};
use super::{IoError, Result};
use crate::pipeline::InputSpec;
use crate::series::Quality;

const BATCH_ROWS: usize = 64 * 1024;

/// A wide Parquet file after its time column was read.
#[derive(Debug)]
pub(crate) struct WideParquet {
    meta: ArrowReaderMetadata,
    stamp: Stamp,
    /// Tag names and their root column indices, by file-local id.
    names: Vec<String>,
    roots: Vec<usize>,
    /// The time of each row, microseconds UTC.
    times: Vec<i64>,
}

/// Checks the tag column names of a wide file: each named, none twice.
fn check_names<'a>(path: &Path, cols: impl Iterator<Item = (usize, &'a str)>) -> Result<()> {
    let mut seen = HashSet::new();
    for (i, name) in cols {
        if name.trim().is_empty() {
            return Err(IoError::BadColumn {
                path: path.to_path_buf(),
                index: i + 1,
                column: name.to_string(),
                reason: "has no name; in a wide file every column other than the time column is a tag and needs one"
                    .into(),
            });
        }
        if !seen.insert(name) {
            return Err(IoError::BadColumn {
                path: path.to_path_buf(),
                index: i + 1,
                column: name.to_string(),
                reason: "the name is used by an earlier column too; a tag can have one column only".into(),
            });
        }
    }
    Ok(())
}

/// Opens a wide Parquet file: finds the tag columns and reads the time column.
pub(super) fn open_parquet(
    path: &Path,
    spec: &InputSpec,
    resolver: &mut LocalResolver,
    fold: &mut FoldState,
) -> Result<(WideParquet, u64)> {
    guarded(path, || open_parquet_unguarded(path, spec, resolver, fold))
}

fn open_parquet_unguarded(
    path: &Path,
    spec: &InputSpec,
    resolver: &mut LocalResolver,
    fold: &mut FoldState,
) -> Result<(WideParquet, u64)> {
    let (meta, stamp) = load(path)?;
    let schema: &Schema = meta.schema();
    let time_name = &spec.columns.time;
    let time = find_column(path, schema, "time", time_name, is_time, TIME_TYPES)?;
    let tag_cols: Vec<(usize, &str)> = schema
        .fields()
        .iter()
        .enumerate()
        .filter(|(i, f)| *i != time && is_numeric(f.data_type()))
        .map(|(i, f)| (i, f.name().as_str()))
        .collect();
    check_names(path, tag_cols.iter().copied())?;
    if tag_cols.is_empty() {
        return Err(IoError::Empty {
            path: path.to_path_buf(),
            what: "no tag columns (no numeric column besides the time column)",
        });
    }
    let names = tag_cols.iter().map(|(_, n)| n.to_string()).collect();
    let roots = tag_cols.iter().map(|(i, _)| *i).collect();

    let file = stamp.reopen(path)?;
    let reader = ParquetRecordBatchReaderBuilder::new_with_metadata(file, meta.clone())
        .with_projection(ProjectionMask::roots(meta.parquet_schema(), [time]))
        .with_batch_size(BATCH_ROWS)
        .build()
        .map_err(|e| corrupt(path, e))?;
    let mut times = Vec::new();
    for batch in reader {
        let batch = batch.map_err(|e| corrupt(path, e))?;
        let col = batch.column(0);
        let tc = TimeCol::new(col.as_ref(), spec.epoch_unit).ok_or_else(|| IoError::ColumnType {
            path: path.to_path_buf(),
            role: "time",
            column: time_name.clone(),
            found: col.data_type().to_string(),
            expected: TIME_TYPES,
        })?;
        for i in 0..batch.num_rows() {
            let row = times.len() as u64 + 1;
            let t = match tc.micros(i) {
                Ok(Some(t)) => t,
                Ok(None) => return Err(bad_time(path, row, time_name, "null", "the time is null")),
                Err(raw) => return Err(bad_time(path, row, time_name, &raw, "out of range")),
            };
            let t = if tc.local {
                local_to_utc(resolver, fold, t)
                    .map_err(|reason| bad_time(path, row, time_name, &format_local(t), &reason))?
            } else {
                t
            };
            times.push(t);
        }
    }
    if times.is_empty() {
        return Err(IoError::Empty { path: path.to_path_buf(), what: "no data rows" });
    }
    let rows = times.len() as u64;
    Ok((WideParquet { meta, stamp, names, roots, times }, rows))
}

impl WideParquet {
    /// Tag names by file-local id.
    pub(super) fn names(&self) -> &[String] {
        &self.names
    }

    /// Root column index of each tag, by file-local id.
    pub(super) fn roots(&self) -> &[usize] {
        &self.roots
    }

    /// Reads the columns `cols` (tag id, root column index).
    pub(super) fn read(&self, path: &Path, cols: &[(u32, usize)]) -> Result<HashMap<u32, Chunk>> {
        guarded(path, || self.read_unguarded(path, cols))
    }

    fn read_unguarded(&self, path: &Path, cols: &[(u32, usize)]) -> Result<HashMap<u32, Chunk>> {
        let file = self.stamp.reopen(path)?;
        let mut roots: Vec<usize> = cols.iter().map(|c| c.1).collect();
        roots.sort_unstable();
        roots.dedup();
        let reader = ParquetRecordBatchReaderBuilder::new_with_metadata(file, self.meta.clone())
            .with_projection(ProjectionMask::roots(self.meta.parquet_schema(), roots.iter().copied()))
            .with_batch_size(BATCH_ROWS)
            .build()
            .map_err(|e| corrupt(path, e))?;
        let mut out: HashMap<u32, Chunk> = cols.iter().map(|c| (c.0, Chunk::default())).collect();
        let mut base = 0usize;
        for batch in reader {
            let batch = batch.map_err(|e| corrupt(path, e))?;
            let n = batch.num_rows();
            if base + n > self.times.len() {
                return Err(corrupt(path, "the file has more rows than when it was opened"));
            }
            for &(id, root) in cols {
                let Some(p) = roots.iter().position(|&r| r == root) else { continue };
                let col = batch.column(p);
                let values = ValueCol::new(col.as_ref()).ok_or_else(|| IoError::ColumnType {
                    path: path.to_path_buf(),
                    role: "tag",
                    column: self.meta.schema().field(root).name().clone(),
                    found: col.data_type().to_string(),
                    expected: VALUE_TYPES,
                })?;
                let Some(chunk) = out.get_mut(&id) else { continue };
                for i in 0..n {
                    if let Some(v) = values.get(i) {
                        chunk.push(self.times[base + i], false, v, Quality::Good, (base + i + 1) as u64);
                    }
                }
            }
            base += n;
        }
        Ok(out)
    }
}

/// What a CSV column turned out to be.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Kind {
    /// No value yet.
    Unknown,
    Tag,
    Text,
}

/// Reads a whole wide CSV file: tag names (by file-local id), each tag's
/// rows, and the row count.
pub(super) fn read_csv(
    path: &Path,
    spec: &InputSpec,
    resolver: &mut LocalResolver,
    fold: &mut FoldState,
) -> Result<(Vec<String>, HashMap<u32, Chunk>, u64)> {
    let file = open_file(path)?;
    let mut rdr = csv_reader(BufReader::with_capacity(1 << 16, file));
    let headers = rdr.headers().map_err(|e| csv_error(path, e, None))?.clone();
    let time_name = &spec.columns.time;
    let time = find_header(path, &headers, "time", time_name)?;
    let others: Vec<usize> = (0..headers.len()).filter(|&i| i != time).collect();
    check_names(path, others.iter().map(|&i| (i, headers.get(i).unwrap_or(""))))?;
    let mut kinds = vec![Kind::Unknown; others.len()];
    let mut chunks: Vec<Chunk> = vec![Chunk::default(); others.len()];
    let mut rec = csv::StringRecord::new();
    let mut rows = 0u64;
    loop {
        match rdr.read_record(&mut rec) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => return Err(csv_error(path, e, Some(&headers))),
        }
        rows += 1;
        let row = rec.position().map_or(rows + 1, |p| p.record() + 1);
        let text = rec.get(time).unwrap_or("");
        let t = match parse_time_text(text, spec.epoch_unit) {
            Ok(TimeVal::Instant(t)) => t,
            Ok(TimeVal::Local(l)) => {
                local_to_utc(resolver, fold, l).map_err(|reason| bad_time(path, row, time_name, text, &reason))?
            }
            Err(reason) => return Err(bad_time(path, row, time_name, text, &reason)),
        };
        for (k, &i) in others.iter().enumerate() {
            let cell = rec.get(i).unwrap_or("");
            if cell.is_empty() || kinds[k] == Kind::Text {
                continue;
            }
            match parse_value_text(cell) {
                Some(v) => {
                    kinds[k] = Kind::Tag;
                    chunks[k].push(t, false, v.unwrap_or(f64::NAN), Quality::Good, row);
                }
                None if kinds[k] == Kind::Unknown => kinds[k] = Kind::Text,
                None => {
                    return Err(bad_row(
                        path,
                        row,
                        headers.get(i).unwrap_or(""),
                        format!("value `{cell}` is not a number (the column is a tag: its first value was a number)"),
                    ))
                }
            }
        }
    }
    if rows == 0 {
        return Err(IoError::Empty { path: path.to_path_buf(), what: "no data rows" });
    }
    let mut names = Vec::new();
    let mut out = HashMap::new();
    for ((k, &i), chunk) in others.iter().enumerate().zip(chunks) {
        if kinds[k] != Kind::Text {
            out.insert(names.len() as u32, chunk);
            names.push(headers.get(i).unwrap_or("").to_string());
        }
    }
    Ok((names, out, rows))
}
