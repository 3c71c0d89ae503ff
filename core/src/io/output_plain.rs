//! The plain columns of `cleaned.parquet` (`ts`, `raw`, `value`, `std`),
//! written with Parquet's column writers directly.
//!
//! The Arrow writer first turns every slice into definition levels and a
//! list of the non-null rows' indices (8 bytes a row), then gathers the
//! values by those indices, although nearly every slice here has no null
//! at all (`ts`, `raw`, and `value` outside rejected rows) or only nulls
//! (`std` on a tag that no model touched). Here a slice without nulls is
//! handed over as it is, with a shared run of definition levels 1; a slice
//! of nulls as definition levels 0 and no value; only a mixed slice is
//! compacted. The pages, their encoding, compression and statistics are the
//! column writer's, as with the Arrow writer (the file is the same bytes;
//! `output_tests.rs` reads it back).

use std::sync::{Arc, Mutex};

use bytes::Bytes;
use parquet::column::page::{CompressedPage, PageWriteSpec, PageWriter};
use parquet::column::writer::{get_column_writer, ColumnCloseResult, ColumnWriter, ColumnWriterImpl};
use parquet::data_type::{DoubleType, Int64Type};
use parquet::errors::{ParquetError, Result};
use parquet::file::properties::WriterPropertiesPtr;
use parquet::file::writer::{SerializedPageWriter, TrackedWrite};
use parquet::schema::types::ColumnDescPtr;

/// The bytes of a finished chunk, handed from the page writer at close.
type Shared = Arc<Mutex<Option<Vec<u8>>>>;

/// Pages serialised into memory (the chunk starts at offset 0); the row
/// group writer appends the bytes to the file.
struct MemoryPages {
    sink: Option<TrackedWrite<Vec<u8>>>,
    done: Shared,
}

impl PageWriter for MemoryPages {
    fn write_page(&mut self, page: CompressedPage) -> Result<PageWriteSpec> {
        let sink = self.sink.as_mut().ok_or_else(|| ParquetError::General("page written after close".into()))?;
        SerializedPageWriter::new(sink).write_page(page)
    }

    fn close(&mut self) -> Result<()> {
        let Some(sink) = self.sink.take() else { return Ok(()) };
        let bytes = sink.into_inner()?;
        let mut done = self.done.lock().map_err(|_| ParquetError::General("chunk buffer poisoned".into()))?;
        *done = Some(bytes);
        Ok(())
    }
}

enum Typed {
    Time(ColumnWriterImpl<'static, Int64Type>),
    Float(ColumnWriterImpl<'static, DoubleType>),
}

/// One plain column of the row group being filled.
pub(super) struct PlainChunk {
    writer: Typed,
    done: Shared,
    /// Definition levels: a run of 1s (grown as needed) and scratch.
    ones: Vec<i16>,
    levels: Vec<i16>,
    /// The non-null values of a mixed slice.
    values: Vec<f64>,
    rows: u64,
}

impl PlainChunk {
    /// A chunk writer for column `descr` (INT64 or DOUBLE) with the file's
    /// properties, writing its pages into `buf` (emptied first): the buffer
    /// of the column's last chunk, so its memory is reused rather than
    /// grown afresh for every row group.
    pub(super) fn new(descr: ColumnDescPtr, props: WriterPropertiesPtr, mut buf: Vec<u8>) -> Result<Self> {
        buf.clear();
        let done: Shared = Arc::new(Mutex::new(None));
        let pages = MemoryPages { sink: Some(TrackedWrite::new(buf)), done: done.clone() };
        let name = descr.path().string();
        let writer = match get_column_writer(descr, props, Box::new(pages)) {
            ColumnWriter::Int64ColumnWriter(w) => Typed::Time(w),
            ColumnWriter::DoubleColumnWriter(w) => Typed::Float(w),
            _ => return Err(ParquetError::General(format!("column `{name}` is neither INT64 nor DOUBLE"))),
        };
        Ok(PlainChunk { writer, done, ones: Vec::new(), levels: Vec::new(), values: Vec::new(), rows: 0 })
    }

    /// Appends times (a required INT64 column).
    pub(super) fn push_times(&mut self, ts: &[i64]) -> Result<()> {
        self.rows += ts.len() as u64;
        match &mut self.writer {
            Typed::Time(w) => w.write_batch(ts, None, None).map(|_| ()),
            Typed::Float(_) => Err(ParquetError::General("times written to a float column".into())),
        }
    }

    /// Appends floats (an optional DOUBLE column); row `i` is null where
    /// `null(i, v[i])`.
    pub(super) fn push_floats(&mut self, v: &[f64], null: impl Fn(usize, f64) -> bool) -> Result<()> {
        let Typed::Float(w) = &mut self.writer else {
            return Err(ParquetError::General("floats written to a time column".into()));
        };
        let n = v.len();
        self.rows += n as u64;
        // Branch-free counts, so they vectorise.
        let nulls = v.iter().enumerate().fold(0usize, |c, (i, &x)| c + usize::from(null(i, x)));
        if nulls == 0 {
            if self.ones.len() < n {
                self.ones.resize(n, 1);
            }
            w.write_batch(v, Some(&self.ones[..n]), None)?;
        } else if nulls == n {
            self.levels.clear();
            self.levels.resize(n, 0);
            w.write_batch(&[], Some(&self.levels), None)?;
        } else {
            self.levels.clear();
            self.values.clear();
            for (i, &x) in v.iter().enumerate() {
                let is_null = null(i, x);
                self.levels.push(i16::from(!is_null));
                if !is_null {
                    self.values.push(x);
                }
            }
            w.write_batch(&self.values, Some(&self.levels), None)?;
        }
        Ok(())
    }

    /// Rows written so far.
    pub(super) fn rows(&self) -> u64 {
        self.rows
    }

    /// The chunk's bytes (its first page at offset 0) and what the row
    /// group writer needs to append them.
    pub(super) fn finish(self) -> Result<(Bytes, ColumnCloseResult)> {
        let close = match self.writer {
            Typed::Time(w) => w.close()?,
            Typed::Float(w) => w.close()?,
        };
        let bytes = self
            .done
            .lock()
            .map_err(|_| ParquetError::General("chunk buffer poisoned".into()))?
            .take()
            .ok_or_else(|| ParquetError::General("the column writer did not close its pages".into()))?;
        Ok((Bytes::from(bytes), close))
    }
}
