//! The error type of the readers.

use std::path::PathBuf;

/// Boxed source error of the Parquet and Arrow libraries.
pub type BoxError = Box<dyn std::error::Error + Send + Sync + 'static>;

/// What can go wrong when reading input files or writing outputs.
///
/// Every variant names the file, and where it makes sense the row, the
/// column or the tag. Rows are counted from 1: in a CSV file the header is row 1 (so
/// the first sample is row 2, as a spreadsheet shows it); in a Parquet file
/// row 1 is the first row of data.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum IoError {
    /// The file does not exist.
    #[error("{}: file not found", path.display())]
    NotFound { path: PathBuf },
    /// The file exists but cannot be opened or read.
    #[error("{}: cannot read the file: {source}", path.display())]
    Unreadable {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The file name does not say which format the file is in.
    #[error("{}: unknown input format {}; expected a name ending in .csv, .parquet or .pq", path.display(), describe_extension(extension.as_deref()))]
    UnknownFormat { path: PathBuf, extension: Option<String> },
    /// The file is not a Parquet file, or its footer, metadata or data pages are damaged.
    #[error("{}: not a Parquet file, or the file is damaged or truncated: {source}", path.display())]
    CorruptParquet {
        path: PathBuf,
        #[source]
        source: BoxError,
    },
    /// The file has no data.
    #[error("{}: the file is empty ({what})", path.display())]
    Empty { path: PathBuf, what: &'static str },
    /// A column the reader needs is not in the file.
    #[error("{}: no {role} column `{column}`; the columns present are: {}", path.display(), available.join(", "))]
    MissingColumn {
        path: PathBuf,
        /// What the column is for: `tag`, `time` or `value`.
        role: &'static str,
        column: String,
        available: Vec<String>,
    },
    /// A Parquet column whose type the reader cannot use for its role.
    #[error("{}: column `{column}` has type {found}; as the {role} column it must be {expected}", path.display())]
    ColumnType { path: PathBuf, role: &'static str, column: String, found: String, expected: &'static str },
    /// A row that cannot be read (wrong number of fields, invalid UTF-8, a
    /// value that is not a number, an empty tag, an unknown quality word).
    #[error("{}: row {row}{}: {reason}", path.display(), in_column(column.as_deref()))]
    BadRow { path: PathBuf, row: u64, column: Option<String>, reason: String },
    /// A time that is empty, null, cannot be parsed or is out of range.
    #[error("{}: row {row}, column `{column}`: bad time `{text}`: {reason}", path.display())]
    BadTime { path: PathBuf, row: u64, column: String, text: String, reason: String },
    /// Two samples of the tag carry the same time.
    #[error("{}: tag `{tag}` has two samples at {time} (rows {first_row} and {second_row}); duplicate times are not allowed", path.display())]
    DuplicateTime { path: PathBuf, tag: String, time: String, first_row: u64, second_row: u64 },
    /// Two samples of the tag carry the same time, in two different files
    /// (the `error` duplicate rule).
    #[error("tag `{tag}` has two samples at {time} ({} row {first_row} and {} row {second_row}); duplicate times are not allowed", first_path.display(), second_path.display())]
    DuplicateTimeAcross {
        tag: String,
        time: String,
        first_path: PathBuf,
        first_row: u64,
        second_path: PathBuf,
        second_row: u64,
    },
    /// A tag asked of an [`super::InputSet`] that none of its files holds.
    #[error("tag `{tag}` is not in the input ({n_files} file(s) read)")]
    TagNotInInput { tag: String, n_files: usize },
    /// The same file was given twice, or no file at all.
    #[error("{}: {reason}", path.display())]
    BadInputList { path: PathBuf, reason: String },
    /// A column of a wide file that cannot be a tag (no name, or a name used twice).
    #[error("{}: column {index} (`{column}`): {reason}", path.display())]
    BadColumn { path: PathBuf, index: usize, column: String, reason: String },
    /// An output file or directory cannot be created, written, synced or moved.
    #[error("{}: cannot write: {source}", path.display())]
    Write {
        path: PathBuf,
        #[source]
        source: BoxError,
    },
    /// A table given to [`super::CleanedWriter::write_tag`] breaks the
    /// writer's contract (tags in sorted order, rows in time order, equal
    /// column lengths).
    #[error("{}: tag `{tag}`: {reason}", path.display())]
    BadTable { path: PathBuf, tag: String, reason: String },
    /// No row carries the requested tag.
    #[error("{}: tag `{tag}` not found in column `{column}`; {}", path.display(), describe_present(present, *n_present))]
    TagNotFound {
        path: PathBuf,
        tag: String,
        column: String,
        /// The first tags present, in sorted order (at most [`MAX_TAGS_LISTED`]).
        present: Vec<String>,
        /// How many distinct tags the file has.
        n_present: usize,
    },
}

/// How many of the tags present a [`IoError::TagNotFound`] lists.
pub const MAX_TAGS_LISTED: usize = 10;

impl IoError {
    /// True when the error is the caller's (a tag that is not in the file,
    /// a file name without a known format) rather than the file's.
    pub fn is_usage(&self) -> bool {
        matches!(self, IoError::TagNotFound { .. } | IoError::UnknownFormat { .. })
    }
}

fn describe_extension(ext: Option<&str>) -> String {
    match ext {
        Some(e) => format!("`.{e}`"),
        None => "(the name has no extension)".to_string(),
    }
}

fn in_column(column: Option<&str>) -> String {
    match column {
        Some(c) => format!(", column `{c}`"),
        None => String::new(),
    }
}

fn describe_present(present: &[String], n_present: usize) -> String {
    if n_present == 0 {
        return "the file has no tags (the tag column is empty)".to_string();
    }
    let list = present.join(", ");
    if n_present > present.len() {
        format!("the file has {n_present} tags, the first {} being: {list}", present.len())
    } else {
        format!("the tags present are: {list}")
    }
}
