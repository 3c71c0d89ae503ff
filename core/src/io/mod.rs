//! Input and output files.
//!
//! - [`InputSet`] is the input of a pipeline run. Long format (one row per
//!   sample: tag, time, value, optional quality) or wide format (one time
//!   column, one column per tag), CSV or Parquet, several files merged. Local
//!   times in the site's zone with a stated daylight-saving rule; quality
//!   codes (OPC byte, OPC UA, words) mapped to good / uncertain / bad;
//!   duplicates, non-finite values and a time window handled by stated
//!   rules; tag-ordered files read tag by tag without holding the whole file.
//!   The rules are written out for users in `docs/input.md`.
//! - [`CleanedWriter`] writes `cleaned.parquet`.
//! - [`OutputDir`] makes all-or-nothing outputs through a staging directory.
//! - [`read_tag`] reads one tag's samples from one long-format file (the `fit`
//!   command), with the simpler rules below.
//!
//! # Rules of [`read_tag`]
//!
//! - Rows of other tags are skipped without looking at their time or value
//!   (a CSV row with the wrong number of fields or invalid UTF-8 is an error
//!   wherever it is, since its tag cannot be read).
//! - Rows may come in any order; the tag's samples are sorted by time, and
//!   the number of rows that were out of order is counted
//!   ([`ReadStats::n_out_of_order`]).
//! - Two samples of the tag at the same time (after conversion to whole
//!   microseconds) are an error naming the time and both rows.
//! - An empty or null value is missing (NaN). A value that is NaN or
//!   infinite is kept as missing (NaN) and counted ([`ReadStats::n_non_finite`]).
//! - A quality column is not read.
//! - Times: a Parquet timestamp column of any unit (s, ms, us, ns), with or
//!   without a zone, or an Int64 / Int32 column of **epoch seconds**; CSV
//!   RFC 3339 text (`2026-03-01T06:00:05Z`, `2026-03-01T07:00:05+01:00`),
//!   a date and time without offset, or whole epoch seconds. Naive times are
//!   read as UTC ([`InputSet`] reads them in the site's zone).
//!   Sub-microsecond parts are dropped (rounded towards the past).
//!
//! ```
//! use tagwright::io::{infer_period_us, read_tag, ColumnMap};
//! let dir = tempfile::tempdir().unwrap();
//! let path = dir.path().join("shift.csv");
//! std::fs::write(&path, "tag,ts,value\n\
//!     FT-101.PV,2026-03-01T06:00:10Z,12.5\n\
//!     TT-204.PV,2026-03-01T06:00:00Z,81.0\n\
//!     FT-101.PV,2026-03-01T06:00:00Z,12.0\n\
//!     FT-101.PV,2026-03-01T06:00:05Z,\n").unwrap();
//! let s = read_tag(&path, "FT-101.PV", &ColumnMap::default()).unwrap();
//! assert_eq!(s.ts_us, [1_772_344_800_000_000, 1_772_344_805_000_000, 1_772_344_810_000_000]);
//! assert_eq!(s.values[0], 12.0);
//! assert!(s.values[1].is_nan());
//! assert_eq!(infer_period_us(&s.ts_us), Some(5_000_000));
//! ```
//!
//! A run's input and output, end to end:
//!
//! ```
//! use tagwright::io::{CleanedWriter, InputOptions, InputSet, OutputDir};
//! use tagwright::pipeline::{ColumnNames, Compression, DuplicateRule, EpochUnit, InputFormat, InputSpec, QualityCoding};
//! use tagwright::series::{Quality, Sampling, TagTable};
//!
//! let dir = tempfile::tempdir().unwrap();
//! let input = dir.path().join("export.csv");
//! // Local times (Europe/Berlin, UTC+1 in March), OPC quality bytes, sorted by tag.
//! std::fs::write(&input, "tag,ts,value,quality\n\
//!     FT-101.PV,2026-03-01 07:00:00,12.0,192\n\
//!     FT-101.PV,2026-03-01 07:00:05,12.5,64\n\
//!     TT-204.PV,2026-03-01 07:00:00,81.0,192\n").unwrap();
//! let spec = InputSpec {
//!     format: InputFormat::Long,
//!     columns: ColumnNames { quality: Some("quality".into()), ..ColumnNames::default() },
//!     epoch_unit: EpochUnit::Seconds,
//!     quality: QualityCoding::Auto,
//!     duplicates: DuplicateRule::KeepBest,
//! };
//! let set = InputSet::open(&[input], InputOptions { spec: &spec, tz: chrono_tz::Europe::Berlin, window: None }).unwrap();
//! assert_eq!(set.tags(), ["FT-101.PV", "TT-204.PV"]);
//! assert!(set.is_streaming());
//! let series = set.read_tags(set.tags()).unwrap();
//! assert_eq!(series[0].ts_us[0], 1_772_344_800_000_000); // 2026-03-01T06:00:00Z
//! assert_eq!(series[0].quality, [Quality::Good, Quality::Uncertain]);
//!
//! let out = OutputDir::create(&dir.path().join("out")).unwrap();
//! let mut w = CleanedWriter::create(&out.path("cleaned.parquet"), "run-1", Compression::Zstd).unwrap();
//! for s in &series {
//!     w.write_tag(&TagTable::from_series(s, 5_000_000, Sampling::Regular)).unwrap();
//! }
//! assert_eq!(w.close().unwrap(), 3);
//! out.commit().unwrap();
//! assert!(dir.path().join("out/cleaned.parquet").exists());
//! ```

mod atomic;
mod cols;
mod error;
mod input;
mod long;
mod long_csv;
mod long_pq;
mod output;
mod output_encode;
mod output_keys;
mod output_plain;
mod output_sink;
mod quality;
mod time;
mod wide;

use std::path::Path;

pub use atomic::{OutputDir, STAGING_PREFIX};
pub use error::{BoxError, IoError, MAX_TAGS_LISTED};
pub use input::{InputFileInfo, InputOptions, InputSet};
pub use output::{
    cleaned_schema, writer_properties, CleanedWriter, BATCH_ROWS, META_RUN_ID, META_VERSION, ROW_GROUP_ROWS,
};

/// Shorthand for results of this module.
pub type Result<T> = std::result::Result<T, IoError>;

/// Names of the columns of a long-format file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ColumnMap {
    /// Tag name column (string).
    pub tag: String,
    /// Time column.
    pub time: String,
    /// Value column (numeric).
    pub value: String,
}

impl ColumnMap {
    /// Default name of the tag column.
    pub const DEFAULT_TAG: &'static str = "tag";
    /// Default name of the time column.
    pub const DEFAULT_TIME: &'static str = "ts";
    /// Default name of the value column.
    pub const DEFAULT_VALUE: &'static str = "value";
}

impl Default for ColumnMap {
    fn default() -> Self {
        ColumnMap {
            tag: Self::DEFAULT_TAG.to_string(),
            time: Self::DEFAULT_TIME.to_string(),
            value: Self::DEFAULT_VALUE.to_string(),
        }
    }
}

/// Counts kept while reading, so that no rule acts silently.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ReadStats {
    /// Data rows in the file, all tags.
    pub rows_read: u64,
    /// Values of the tag that were empty or null (missing).
    pub n_null: usize,
    /// Values of the tag that were NaN or infinite (kept as missing).
    pub n_non_finite: usize,
    /// Rows of the tag with an earlier time than the row of the tag before them.
    pub n_out_of_order: usize,
}

/// One tag's samples, sorted by time, times unique.
#[derive(Debug, Clone, PartialEq)]
pub struct TagSamples {
    /// The tag name.
    pub tag: String,
    /// Sample times, microseconds since 1970-01-01T00:00:00Z, strictly increasing.
    pub ts_us: Vec<i64>,
    /// Values, NaN where missing; same length as `ts_us`.
    pub values: Vec<f64>,
    /// What the reader counted.
    pub stats: ReadStats,
}

impl TagSamples {
    /// Number of samples.
    pub fn len(&self) -> usize {
        self.ts_us.len()
    }

    /// True when there is no sample.
    pub fn is_empty(&self) -> bool {
        self.ts_us.is_empty()
    }

    /// Number of missing (NaN) values.
    pub fn n_missing(&self) -> usize {
        self.values.iter().filter(|v| v.is_nan()).count()
    }
}

/// File formats the readers know.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Comma-separated text with a header row.
    Csv,
    /// Apache Parquet.
    Parquet,
}

impl Format {
    /// The format a file name says (`.csv`; `.parquet` or `.pq`), case-insensitive.
    pub fn from_path(path: &Path) -> Result<Format> {
        let ext = path.extension().map(|e| e.to_string_lossy().to_ascii_lowercase());
        match ext.as_deref() {
            Some("csv") => Ok(Format::Csv),
            Some("parquet" | "pq") => Ok(Format::Parquet),
            _ => Err(IoError::UnknownFormat { path: path.to_path_buf(), extension: ext }),
        }
    }
}

/// Reads the samples of `tag` from a long-format file (see the module
/// documentation for the rules and the time formats).
pub fn read_tag(path: &Path, tag: &str, columns: &ColumnMap) -> Result<TagSamples> {
    match Format::from_path(path)? {
        Format::Csv => long::read_csv(path, tag, columns),
        Format::Parquet => long::read_parquet(path, tag, columns),
    }
}

/// The median spacing of sorted times (the lower median for an even count),
/// ignoring spacings that are not positive. `None` when there is no positive
/// spacing (fewer than two distinct times).
pub fn infer_period_us(ts: &[i64]) -> Option<i64> {
    // Fast path for the usual regular tag: when more than half of the
    // positive spacings equal the first one, that spacing is the median
    // (a run longer than half a sorted list covers its middle).
    let first = ts.windows(2).map(|w| w[1].saturating_sub(w[0])).find(|&d| d > 0)?;
    // Branch-free and without saturation, so the loop vectorises: a
    // spacing is positive exactly when the later time is greater, and the
    // wrapped difference of such a pair is negative when the spacing is
    // beyond i64::MAX, so it never equals `first` unless `first` itself
    // saturated (then the slow path decides).
    let (mut positive, mut same) = (0usize, 0usize);
    for w in ts.windows(2) {
        let up = w[1] > w[0];
        positive += usize::from(up);
        same += usize::from(up & (w[1].wrapping_sub(w[0]) == first));
    }
    if first < i64::MAX && 2 * same > positive {
        return Some(first);
    }
    let mut d: Vec<i64> = ts.windows(2).map(|w| w[1].saturating_sub(w[0])).filter(|&d| d > 0).collect();
    if d.is_empty() {
        return None;
    }
    let mid = (d.len() - 1) / 2;
    let (_, m, _) = d.select_nth_unstable(mid);
    Some(*m)
}

/// A time in microseconds UTC as RFC 3339 text (`2026-03-01T06:00:05Z`,
/// with a fraction only when there is one); the raw number when it is out of
/// the calendar's range.
pub fn format_ts_us(us: i64) -> String {
    match chrono::DateTime::<chrono::Utc>::from_timestamp_micros(us) {
        Some(t) => t.to_rfc3339_opts(chrono::SecondsFormat::AutoSi, true),
        None => format!("{us} us since 1970-01-01T00:00:00Z"),
    }
}

#[cfg(test)]
mod tests;
