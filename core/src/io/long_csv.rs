//! Long-format CSV input: the first pass (runs of each tag with the byte
//! position where each starts, quality coding) and reads of selected runs
//! by seeking to them.

use std::collections::HashMap;
use std::io::BufReader;
use std::path::Path;

use super::input::{Chunk, LongIndex, Run, Stamp};
use super::long::{csv_error, open_file, parse_value_text};
use super::long_pq::{bad_row, bad_time};
use super::quality::{QualityMap, RawQuality};
use super::time::{parse_time_text, TimeVal};
use super::{IoError, Result};
use crate::pipeline::{InputSpec, QualityCoding};
use crate::series::Quality;

/// A long CSV file after the first pass.
#[derive(Debug)]
pub(crate) struct CsvLong {
    stamp: Stamp,
    time: usize,
    value: usize,
    quality: Option<(usize, QualityMap)>,
    /// Position of the first record of each run (in the order of the runs).
    positions: Vec<csv::Position>,
}

/// A CSV reader with the crate's settings (header row, fields trimmed).
pub(super) fn csv_reader<R: std::io::Read>(r: R) -> csv::Reader<R> {
    csv::ReaderBuilder::new().trim(csv::Trim::All).from_reader(r)
}

/// Finds a column by header name.
pub(super) fn find_header(path: &Path, headers: &csv::StringRecord, role: &'static str, name: &str) -> Result<usize> {
    headers.iter().position(|h| h == name).ok_or_else(|| IoError::MissingColumn {
        path: path.to_path_buf(),
        role,
        column: name.to_string(),
        available: headers.iter().map(str::to_string).collect(),
    })
}

/// What `auto` learns of an integer-or-text quality column.
#[derive(Default)]
struct QualityScan {
    /// First cell that is not a whole number.
    text: bool,
    max: Option<i64>,
    /// First negative code: row and value.
    negative: Option<(u64, i64)>,
}

/// The first pass over a long CSV file: every row is checked for its field
/// count and UTF-8, the tag of each row is noted (runs and their byte
/// positions), and for `auto` the quality column is scanned.
pub(super) fn open(path: &Path, spec: &InputSpec) -> Result<(CsvLong, LongIndex, u64)> {
    let file = open_file(path)?;
    let stamp = Stamp::of(&file, path)?;
    let mut rdr = csv_reader(BufReader::with_capacity(1 << 16, file));
    let headers = rdr.headers().map_err(|e| csv_error(path, e, None))?.clone();
    let c = &spec.columns;
    let tag = find_header(path, &headers, "tag", &c.tag)?;
    let time = find_header(path, &headers, "time", &c.time)?;
    let value = find_header(path, &headers, "value", &c.value)?;
    let q_col = match &c.quality {
        Some(name) => Some(find_header(path, &headers, "quality", name)?),
        None => None,
    };
    let scan_auto = q_col.is_some() && spec.quality == QualityCoding::Auto;

    let mut index = LongIndex::default();
    let mut positions = Vec::new();
    let mut scan = QualityScan::default();
    let mut rec = csv::StringRecord::new();
    let mut rows = 0u64;
    loop {
        match rdr.read_record(&mut rec) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => return Err(csv_error(path, e, Some(&headers))),
        }
        rows += 1;
        let Some(pos) = rec.position().cloned() else {
            return Err(IoError::BadRow {
                path: path.to_path_buf(),
                row: rows + 1,
                column: None,
                reason: "no position".into(),
            });
        };
        let record = pos.record();
        let t = rec.get(tag).unwrap_or("");
        if t.is_empty() {
            return Err(bad_row(path, record + 1, &c.tag, "the tag is empty".into()));
        }
        let n_runs = index.runs.len();
        index.push(t, record);
        if index.runs.len() > n_runs {
            positions.push(pos);
        }
        if let (true, Some(q)) = (scan_auto, q_col) {
            let cell = rec.get(q).unwrap_or("");
            if !cell.is_empty() && !scan.text {
                match cell.parse::<i64>() {
                    Ok(v) => {
                        scan.max = Some(scan.max.map_or(v, |m| m.max(v)));
                        if v < 0 && scan.negative.is_none() {
                            scan.negative = Some((record + 1, v));
                        }
                    }
                    Err(_) => scan.text = true,
                }
            }
        }
    }
    if rows == 0 {
        return Err(IoError::Empty { path: path.to_path_buf(), what: "no data rows" });
    }
    let quality = match (q_col, &c.quality) {
        (Some(q), Some(name)) => {
            let map = if !scan_auto {
                QualityMap::for_text(&spec.quality)
            } else if scan.text {
                QualityMap::for_text(&QualityCoding::Auto)
            } else if let Some((row, v)) = scan.negative {
                return Err(bad_row(path, row, name, format!("quality code {v} is negative")));
            } else {
                QualityMap::for_integers(&QualityCoding::Auto, scan.max).unwrap_or(QualityMap::OpcByte)
            };
            Some((q, map))
        }
        _ => None,
    };
    Ok((CsvLong { stamp, time, value, quality, positions }, index, rows))
}

impl CsvLong {
    /// Reads the runs `selected` (indices into `runs`, sorted by start),
    /// seeking over the rows between them.
    pub(super) fn read(
        &self,
        path: &Path,
        spec: &InputSpec,
        runs: &[Run],
        selected: &[usize],
    ) -> Result<HashMap<u32, Chunk>> {
        let file = self.stamp.reopen(path)?;
        let mut rdr = csv_reader(BufReader::with_capacity(1 << 16, file));
        let headers = rdr.headers().map_err(|e| csv_error(path, e, None))?.clone();
        let mut out: HashMap<u32, Chunk> = HashMap::new();
        let mut rec = csv::StringRecord::new();
        // Record number of the next record (the header is record 0).
        let mut next = 1u64;
        for &ri in selected {
            let (Some(run), Some(pos)) = (runs.get(ri), self.positions.get(ri)) else { continue };
            if run.start != next {
                rdr.seek(pos.clone()).map_err(|e| csv_error(path, e, Some(&headers)))?;
            }
            let chunk = out.entry(run.tag).or_insert_with(|| Chunk::with_capacity(run.len as usize));
            for k in 0..run.len {
                let row = run.start + k + 1;
                match rdr.read_record(&mut rec) {
                    Ok(true) => {}
                    Ok(false) => {
                        return Err(IoError::Unreadable {
                            path: path.to_path_buf(),
                            source: std::io::Error::other(format!(
                                "the file ends before row {row}; it changed after it was opened"
                            )),
                        })
                    }
                    Err(e) => return Err(csv_error(path, e, Some(&headers))),
                }
                self.take(path, spec, &rec, row, chunk)?;
            }
            next = run.end();
        }
        Ok(out)
    }

    /// Parses one record into the tag's chunk.
    fn take(&self, path: &Path, spec: &InputSpec, rec: &csv::StringRecord, row: u64, chunk: &mut Chunk) -> Result<()> {
        let c = &spec.columns;
        let time_text = rec.get(self.time).unwrap_or("");
        let (ts, local) = match parse_time_text(time_text, spec.epoch_unit) {
            Ok(TimeVal::Instant(t)) => (t, false),
            Ok(TimeVal::Local(t)) => (t, true),
            Err(reason) => return Err(bad_time(path, row, &c.time, time_text, &reason)),
        };
        let value_text = rec.get(self.value).unwrap_or("");
        let value = match parse_value_text(value_text) {
            Some(v) => v.unwrap_or(f64::NAN),
            None => return Err(bad_row(path, row, &c.value, format!("value `{value_text}` is not a number"))),
        };
        let q = match &self.quality {
            None => Quality::Good,
            Some((i, map)) => map
                .map(RawQuality::Text(rec.get(*i).unwrap_or("")))
                .map_err(|reason| bad_row(path, row, c.quality.as_deref().unwrap_or(""), reason))?,
        };
        chunk.push(ts, local, value, q, row);
        Ok(())
    }
}
