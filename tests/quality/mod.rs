//! The evidence-of-quality benchmark of issue 4: a run's outputs scored
//! against the demo scenario's truth, side by side with a rule-of-thumb
//! baseline. The metrics are described for a plant engineer in
//! `docs/quality.md`.
//!
//! - [`read_run`] reads a run's `cleaned.parquet` and `provenance.jsonl` into
//!   a [`RunOutput`]: per tag its [`Row`]s, its provenance [`TagRecord`] and
//!   its [`EventRecord`]s.
//! - [`baseline`] cleans the demo's export rows with rules of thumb (Hampel
//!   filter, N-repeat flatline rule, range limits, bad quality, linear
//!   interpolation) into the same [`RunOutput`] shape.
//! - [`score`] scores one [`RunOutput`] against [`DemoData`] truth and returns
//!   [`Scores`] (counts that add up over cases with [`Scores::merge`]);
//!   [`Targets`] and [`comparison_table`] put a pipeline and a baseline side
//!   by side with the issue's targets.
//!
//! ```no_run
//! use tagwright::demo::{generate, DemoOptions};
//! use tagwright_tests::quality::{baseline, read_run, score, BaselineParams};
//!
//! let data = generate(&DemoOptions::default());
//! let pipeline = read_run(std::path::Path::new("run")).unwrap();
//! let base = baseline(&data.rows, &data.tags, &BaselineParams::default());
//! println!("{}", score("pipeline", &pipeline, &data));
//! println!("{}", score("baseline", &base, &data));
//! ```
//!
//! [`DemoData`]: tagwright::demo::DemoData

// The crate allows unwrap/expect for test setup; this module reads files
// and must say what is wrong instead.
#![deny(clippy::unwrap_used, clippy::expect_used, clippy::panic)]

mod baseline;
mod outputs;
mod score;
mod table;

#[cfg(test)]
mod tests;

use std::collections::BTreeMap;
use std::path::PathBuf;

use serde::Serialize;
use tagwright::series::Fault;

pub use baseline::{baseline, BaselineParams};
pub use outputs::{read_cleaned, read_provenance, read_run};
pub use score::{
    score, DriftScore, EventScore, FalseAlarms, FillBucket, FillError, GapBucket, ProcessFlag, Ratio, Rmse, Scores,
};
pub use table::{comparison_table, paired_fill_rmse, pct, Check, Targets, Verdict};

/// Row status of `cleaned.parquet`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Status {
    /// Reading kept.
    Ok,
    /// Row inserted in a gap.
    Filled,
    /// Reading judged faulty, estimate given.
    Replaced,
    /// Reading judged faulty, no estimate.
    Rejected,
}

impl Status {
    /// The status as written in `cleaned.parquet`, if `s` is one.
    pub fn parse(s: &str) -> Option<Status> {
        match s {
            "ok" => Some(Status::Ok),
            "filled" => Some(Status::Filled),
            "replaced" => Some(Status::Replaced),
            "rejected" => Some(Status::Rejected),
            _ => None,
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            Status::Ok => "ok",
            Status::Filled => "filled",
            Status::Replaced => "replaced",
            Status::Rejected => "rejected",
        }
    }
}

/// The fault kind named `s` in `cleaned.parquet` (`spike`, ..., `bad_quality`).
pub fn parse_fault(s: &str) -> Option<Fault> {
    Fault::ALL.into_iter().find(|f| f.as_str() == s)
}

/// One output row of one tag.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row {
    /// Sample time, µs since the Unix epoch, UTC.
    pub ts_us: i64,
    /// The reading as read; None on inserted rows.
    pub raw: Option<f64>,
    /// The cleaned value; None where nothing honest can be given.
    pub value: Option<f64>,
    /// Posterior standard deviation of the true process value.
    pub std: Option<f64>,
    pub status: Status,
    pub fault: Option<Fault>,
}

impl Row {
    /// A kept reading without a fault.
    pub fn ok(ts_us: i64, v: f64) -> Row {
        Row { ts_us, raw: Some(v), value: Some(v), std: None, status: Status::Ok, fault: None }
    }
}

/// The provenance `tag` record (the fields the scorer uses, and `extra` whole).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TagRecord {
    pub tag: String,
    /// `ok` or `failed`.
    pub outcome: String,
    pub error: Option<String>,
    pub group: Option<String>,
    pub steps: Vec<String>,
    pub model: Option<String>,
    /// Step-specific results, e.g. `{"drift": {"bias_end": 2.1, "attributed": true}}`.
    pub extra: serde_json::Map<String, serde_json::Value>,
    pub notes: Vec<String>,
}

impl TagRecord {
    /// `extra.drift.bias_end` when it is a number.
    pub fn drift_bias_end(&self) -> Option<f64> {
        self.extra.get("drift")?.get("bias_end")?.as_f64()
    }

    /// `extra.drift.verdict` when it is text.
    pub fn drift_verdict(&self) -> Option<&str> {
        self.extra.get("drift")?.get("verdict")?.as_str()
    }

    /// `extra.drift.attributed` when it is a boolean.
    pub fn drift_attributed(&self) -> Option<bool> {
        self.extra.get("drift")?.get("attributed")?.as_bool()
    }
}

/// The provenance `event` record.
#[derive(Debug, Clone, PartialEq)]
pub struct EventRecord {
    pub tag: String,
    pub from_us: i64,
    pub to_us: i64,
    /// `filled`, `replaced`, `rejected` or `flagged`.
    pub action: String,
    pub fault: Option<Fault>,
    pub step: Option<String>,
    pub statistic: Option<f64>,
    pub threshold: Option<f64>,
    pub rows: u64,
}

/// One run's outputs (a pipeline run read from files, or the baseline).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RunOutput {
    /// Output rows by tag, each in time order.
    pub rows: BTreeMap<String, Vec<Row>>,
    /// Provenance tag records by tag (empty for the baseline).
    pub records: BTreeMap<String, TagRecord>,
    /// Provenance events in file order (empty for the baseline).
    pub events: Vec<EventRecord>,
}

impl RunOutput {
    /// The rows of `tag` (empty if the output has none).
    pub fn rows_of(&self, tag: &str) -> &[Row] {
        self.rows.get(tag).map_or(&[], Vec::as_slice)
    }

    /// Number of output rows, all tags.
    pub fn len(&self) -> usize {
        self.rows.values().map(Vec::len).sum()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// What can go wrong reading a run's outputs.
#[derive(Debug)]
#[non_exhaustive]
pub enum QualityError {
    /// The file cannot be opened or read.
    Io { path: PathBuf, source: std::io::Error },
    /// The Parquet reader refused the file.
    Parquet { path: PathBuf, message: String },
    /// A column is missing or has an unexpected type or value.
    Column { path: PathBuf, column: String, what: String },
    /// A line of `provenance.jsonl` is not valid JSON or lacks a field.
    Line { path: PathBuf, line: usize, what: String },
}

impl std::fmt::Display for QualityError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            QualityError::Io { path, source } => write!(f, "{}: cannot read: {source}", path.display()),
            QualityError::Parquet { path, message } => {
                write!(f, "{}: not a readable Parquet file: {message}", path.display())
            }
            QualityError::Column { path, column, what } => write!(f, "{}: column `{column}`: {what}", path.display()),
            QualityError::Line { path, line, what } => write!(f, "{}:{line}: {what}", path.display()),
        }
    }
}

impl std::error::Error for QualityError {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        match self {
            QualityError::Io { source, .. } => Some(source),
            _ => None,
        }
    }
}
