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
//! column writer's, as with the Arrow writer (`output_tests.rs` reads the
//! file back).
//!
//! A float column to be written byte-stream-split without statistics or a
//! bloom filter (as `cleaned.parquet`'s are) is split here, a page at a
//! time: Parquet's encoder scatters the bytes one at a time, which took a
//! sixth of the encoding time. The pages are cut at [`SPLIT_PAGE_ROWS`]
//! rows; each page's values, already split, go through the column writer
//! as plain values (the plain encoder copies their bytes as they are, and
//! computes nothing from them), and the page headers and the chunk's
//! metadata then name the encoding the bytes are in, byte-stream-split.
//! A reader gets the same values, bit for bit.

use std::sync::{Arc, Mutex};

use bytes::Bytes;
use parquet::basic::Encoding;
use parquet::column::page::{CompressedPage, Page, PageWriteSpec, PageWriter};
use parquet::column::writer::{get_column_writer, ColumnCloseResult, ColumnWriter, ColumnWriterImpl};
use parquet::data_type::{DoubleType, Int64Type};
use parquet::errors::{ParquetError, Result};
use parquet::file::properties::{EnabledStatistics, WriterProperties, WriterPropertiesPtr};
use parquet::file::writer::{SerializedPageWriter, TrackedWrite};
use parquet::schema::types::ColumnDescPtr;

/// Rows per page of a float column split here (about the column writer's
/// own pages: 20,000 rows, rounded up to its batches of 1,024).
pub(super) const SPLIT_PAGE_ROWS: usize = 20 * 1024;

/// The bytes of a finished chunk, handed from the page writer at close.
type Shared = Arc<Mutex<Option<Vec<u8>>>>;

/// Pages serialised into memory (the chunk starts at offset 0); the row
/// group writer appends the bytes to the file.
struct MemoryPages {
    sink: Option<TrackedWrite<Vec<u8>>>,
    done: Shared,
    /// The data pages hold byte-stream-split values, written as plain ones:
    /// their headers say so.
    split: bool,
}

impl PageWriter for MemoryPages {
    fn write_page(&mut self, page: CompressedPage) -> Result<PageWriteSpec> {
        let sink = self.sink.as_mut().ok_or_else(|| ParquetError::General("page written after close".into()))?;
        let page = match (self.split, page.compressed_page()) {
            (
                true,
                Page::DataPage { buf, num_values, encoding, def_level_encoding, rep_level_encoding, statistics },
            ) => {
                if *encoding != Encoding::PLAIN {
                    return Err(ParquetError::General(format!("a split page came as {encoding}, not PLAIN")));
                }
                let p = Page::DataPage {
                    buf: buf.clone(),
                    num_values: *num_values,
                    encoding: Encoding::BYTE_STREAM_SPLIT,
                    def_level_encoding: *def_level_encoding,
                    rep_level_encoding: *rep_level_encoding,
                    statistics: statistics.clone(),
                };
                CompressedPage::new(p, page.uncompressed_size())
            }
            (true, other) => {
                return Err(ParquetError::General(format!("a split column wrote a {:?} page", other.page_type())))
            }
            (false, _) => page,
        };
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
    /// Splitting here (see the module documentation).
    split: Option<SplitPages>,
}

/// A split float column's rows not yet written (less than a page) and the
/// buffers of its pages.
#[derive(Default)]
struct SplitPages {
    /// The gathered rows: value, and whether it is null.
    values: Vec<f64>,
    null: Vec<bool>,
    /// A page's split values (as words), and bytes when its count of
    /// values is not a multiple of 8.
    words: Vec<f64>,
    bytes: Vec<u8>,
}

impl PlainChunk {
    /// A chunk writer for column `descr` (INT64 or DOUBLE) with the file's
    /// properties, writing its pages into `buf` (emptied first): the buffer
    /// of the column's last chunk, so its memory is reused rather than
    /// grown afresh for every row group.
    pub(super) fn new(descr: ColumnDescPtr, props: WriterPropertiesPtr, mut buf: Vec<u8>) -> Result<Self> {
        buf.clear();
        let done: Shared = Arc::new(Mutex::new(None));
        let path = descr.path().clone();
        // A float column the file writes byte-stream-split in version 1
        // pages, without a dictionary, statistics or a bloom filter, is
        // split here (pages of plain values, relabelled). Statistics or a
        // bloom filter would be taken from the split bytes: such a column,
        // like any other, goes through the column writer's own encoder.
        let split = descr.physical_type() == parquet::basic::Type::DOUBLE
            && props.encoding(&path) == Some(Encoding::BYTE_STREAM_SPLIT)
            && !props.dictionary_enabled(&path)
            && props.statistics_enabled(&path) == EnabledStatistics::None
            && props.bloom_filter_properties(&path).is_none()
            && props.writer_version() == parquet::file::properties::WriterVersion::PARQUET_1_0;
        let props = if split {
            let p = WriterProperties::builder()
                .set_writer_version(props.writer_version())
                .set_compression(props.compression(&path))
                .set_dictionary_enabled(false)
                .set_encoding(Encoding::PLAIN)
                .set_statistics_enabled(EnabledStatistics::None)
                .set_data_page_row_count_limit(SPLIT_PAGE_ROWS)
                .set_write_batch_size(SPLIT_PAGE_ROWS)
                .set_data_page_size_limit(2 * 8 * SPLIT_PAGE_ROWS)
                .build();
            Arc::new(p)
        } else {
            props
        };
        let pages = MemoryPages { sink: Some(TrackedWrite::new(buf)), done: done.clone(), split };
        let name = path.string();
        let writer = match get_column_writer(descr, props, Box::new(pages)) {
            ColumnWriter::Int64ColumnWriter(w) => Typed::Time(w),
            ColumnWriter::DoubleColumnWriter(w) => Typed::Float(w),
            _ => return Err(ParquetError::General(format!("column `{name}` is neither INT64 nor DOUBLE"))),
        };
        let split = split.then(SplitPages::default);
        Ok(PlainChunk { writer, done, ones: Vec::new(), levels: Vec::new(), values: Vec::new(), rows: 0, split })
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
        self.rows += v.len() as u64;
        let Some(mut sp) = self.split.take() else { return self.write_floats(v, null, None) };
        let r = self.push_split(&mut sp, v, null);
        self.split = Some(sp);
        r
    }

    /// [`PlainChunk::push_floats`] on a split column: whole pages straight
    /// from `v`, the rest gathered for the next page.
    fn push_split(&mut self, sp: &mut SplitPages, v: &[f64], null: impl Fn(usize, f64) -> bool) -> Result<()> {
        let mut i = 0;
        while i < v.len() {
            if sp.values.is_empty() && v.len() - i >= SPLIT_PAGE_ROWS {
                self.write_floats(&v[i..i + SPLIT_PAGE_ROWS], |k, x| null(i + k, x), Some(sp))?;
                i += SPLIT_PAGE_ROWS;
                continue;
            }
            let take = (SPLIT_PAGE_ROWS - sp.values.len()).min(v.len() - i);
            sp.values.extend_from_slice(&v[i..i + take]);
            sp.null.extend((i..i + take).map(|k| null(k, v[k])));
            i += take;
            if sp.values.len() == SPLIT_PAGE_ROWS {
                self.flush_split(sp)?;
            }
        }
        Ok(())
    }

    /// Writes the gathered rows of a split column as one page.
    fn flush_split(&mut self, sp: &mut SplitPages) -> Result<()> {
        if sp.values.is_empty() {
            return Ok(());
        }
        let (values, null) = (std::mem::take(&mut sp.values), std::mem::take(&mut sp.null));
        let r = self.write_floats(&values, |k, _| null[k], Some(sp));
        (sp.values, sp.null) = (values, null);
        sp.values.clear();
        sp.null.clear();
        r
    }

    /// Hands `v` to the column writer, nulls as definition levels; with
    /// `split`, the non-null values byte-stream-split (as plain words).
    fn write_floats(
        &mut self,
        v: &[f64],
        null: impl Fn(usize, f64) -> bool,
        split: Option<&mut SplitPages>,
    ) -> Result<()> {
        let PlainChunk { writer, ones, levels, values, .. } = self;
        let Typed::Float(w) = writer else {
            return Err(ParquetError::General("floats written to a time column".into()));
        };
        let n = v.len();
        // Branch-free counts, so they vectorise.
        let nulls = v.iter().enumerate().fold(0usize, |c, (i, &x)| c + usize::from(null(i, x)));
        // The definition levels, and the non-null values (`v` itself when
        // none is null).
        let (def, kept): (&[i16], &[f64]) = if nulls == 0 {
            if ones.len() < n {
                ones.resize(n, 1);
            }
            (&ones[..n], v)
        } else if nulls == n {
            levels.clear();
            levels.resize(n, 0);
            (levels, &[])
        } else {
            levels.clear();
            values.clear();
            for (i, &x) in v.iter().enumerate() {
                let is_null = null(i, x);
                levels.push(i16::from(!is_null));
                if !is_null {
                    values.push(x);
                }
            }
            (levels, values)
        };
        let kept: &[f64] = match split {
            Some(sp) => {
                split_streams(kept, &mut sp.words, &mut sp.bytes);
                &sp.words
            }
            None => kept,
        };
        w.write_batch(kept, Some(def), None)?;
        Ok(())
    }

    /// Rows written so far.
    pub(super) fn rows(&self) -> u64 {
        self.rows
    }

    /// The chunk's bytes (its first page at offset 0) and what the row
    /// group writer needs to append them.
    pub(super) fn finish(mut self) -> Result<(Bytes, ColumnCloseResult)> {
        // The last, partial page of a split column.
        if let Some(mut sp) = self.split.take() {
            self.flush_split(&mut sp)?;
            self.split = Some(sp);
        }
        let split = self.split.is_some();
        let mut close = match self.writer {
            Typed::Time(w) => w.close()?,
            Typed::Float(w) => w.close()?,
        };
        if split {
            // The chunk's metadata names the encoding its pages are in.
            let relabel = |e: Encoding| if e == Encoding::PLAIN { Encoding::BYTE_STREAM_SPLIT } else { e };
            let meta = close.metadata.clone();
            let encodings: Vec<Encoding> = meta.encodings().map(relabel).collect();
            let mut b = meta.into_builder().set_encodings(encodings);
            if let Some(stats) = close.metadata.page_encoding_stats() {
                let stats = stats
                    .iter()
                    .map(|s| parquet::file::metadata::PageEncodingStats { encoding: relabel(s.encoding), ..s.clone() })
                    .collect();
                b = b.set_page_encoding_stats(stats);
            } else if let Some(mask) = close.metadata.page_encoding_stats_mask() {
                b = b.set_page_encoding_stats_mask(parquet::basic::EncodingMask::new_from_encodings(
                    mask.encodings().map(relabel).collect::<Vec<_>>().iter(),
                ));
            }
            close.metadata = b.build()?;
        }
        let bytes = self
            .done
            .lock()
            .map_err(|_| ParquetError::General("chunk buffer poisoned".into()))?
            .take()
            .ok_or_else(|| ParquetError::General("the column writer did not close its pages".into()))?;
        Ok((Bytes::from(bytes), close))
    }
}

/// The byte-stream-split layout of `v` (Parquet's BYTE_STREAM_SPLIT for
/// DOUBLE): byte j of value i at byte `j * n + i`, as n little-endian words
/// in `out` (what the plain encoder writes out byte for byte). Eight values
/// at a time are transposed as an 8 x 8 block of bytes in registers (three
/// rounds of swaps: 4-byte, 2-byte, 1-byte blocks) and written as one word
/// per stream; `scratch` holds the bytes when n is not a multiple of 8.
pub(super) fn split_streams(v: &[f64], out: &mut Vec<f64>, scratch: &mut Vec<u8>) {
    let n = v.len();
    out.clear();
    if n.is_multiple_of(8) {
        // Stream j is words j * n/8 .. (j + 1) * n/8.
        out.resize(n, 0.0);
        let per = n / 8;
        transposed_blocks(v, |j, b, word| out[j * per + b] = f64::from_bits(word));
        return;
    }
    scratch.clear();
    scratch.resize(8 * n, 0);
    transposed_blocks(v, |j, b, word| scratch[j * n + 8 * b..j * n + 8 * b + 8].copy_from_slice(&word.to_le_bytes()));
    for i in n - n % 8..n {
        for (j, byte) in v[i].to_bits().to_le_bytes().into_iter().enumerate() {
            scratch[j * n + i] = byte;
        }
    }
    out.extend(scratch.chunks_exact(8).map(|b| {
        let mut word = [0u8; 8];
        word.copy_from_slice(b);
        f64::from_le_bytes(word)
    }));
}

/// `put(j, b, word)` for stream j of each whole block b of eight values:
/// byte i of `word` is byte j of value 8 b + i.
#[inline]
fn transposed_blocks(v: &[f64], mut put: impl FnMut(usize, usize, u64)) {
    for (b, block) in v.chunks_exact(8).enumerate() {
        let x = transpose8(std::array::from_fn(|i| block[i].to_bits()));
        for (j, &word) in x.iter().enumerate() {
            put(j, b, word);
        }
    }
}

/// The transpose of 8 words as an 8 x 8 matrix of bytes (byte i of word
/// k out is byte k of word i in, little-endian).
#[inline]
fn transpose8(mut x: [u64; 8]) -> [u64; 8] {
    for i in 0..4 {
        let t = ((x[i] >> 32) ^ x[i + 4]) & 0x0000_0000_FFFF_FFFF;
        x[i] ^= t << 32;
        x[i + 4] ^= t;
    }
    for i in [0, 1, 4, 5] {
        let t = ((x[i] >> 16) ^ x[i + 2]) & 0x0000_FFFF_0000_FFFF;
        x[i] ^= t << 16;
        x[i + 2] ^= t;
    }
    for i in [0, 2, 4, 6] {
        let t = ((x[i] >> 8) ^ x[i + 1]) & 0x00FF_00FF_00FF_00FF;
        x[i] ^= t << 8;
        x[i + 1] ^= t;
    }
    x
}
