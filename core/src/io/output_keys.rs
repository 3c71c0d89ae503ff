//! The dictionary string columns of `cleaned.parquet` (`tag`, `status`,
//! `fault`), written as Parquet column chunks straight from their keys.
//!
//! The Arrow writer looks every row of a dictionary column up in a hash
//! table by its string (and, for statistics, compares the strings of every
//! row), although the rows already carry their dictionary key. These
//! columns hold long runs of one value (rows are sorted by tag, and nearly
//! every row is `ok` without a fault), so here each row group's chunk is
//! built from runs of keys: a dictionary page (the distinct values, in order
//! of first use, PLAIN) and data pages (format v1) of at most [`PAGE_ROWS`]
//! rows, whose values are RLE runs of dictionary indices (RLE_DICTIONARY)
//! and, for a nullable column, whose definition levels are RLE runs. A chunk
//! with no value at all (a `fault` column without faults) has no dictionary
//! page and PLAIN data pages holding only the definition levels.
//!
//! The pages hold only run lengths (a few bytes per page), so they are
//! stored uncompressed whatever the file's codec. Every chunk gets an offset
//! index (page locations); a chunk with statistics (`tag`) also gets min and
//! max per chunk and per page (the column index), so a reader can skip row
//! groups and pages by tag. The column encoding round trip is tested against
//! the Parquet reader in `output_tests.rs`; the end-to-end tests read the
//! file in pyarrow and polars.

use std::collections::HashMap;

use bytes::Bytes;
use parquet::basic::{BoundaryOrder, Compression, Encoding, Type as PhysicalType};
use parquet::column::page::{CompressedPage, Page, PageWriter};
use parquet::column::writer::ColumnCloseResult;
use parquet::data_type::ByteArray;
use parquet::errors::{ParquetError, Result};
use parquet::file::metadata::{ColumnChunkMetaData, ColumnIndexBuilder};
use parquet::file::page_index::offset_index::{OffsetIndexMetaData, PageLocation};
use parquet::file::statistics::{Statistics, ValueStatistics};
use parquet::file::writer::{SerializedPageWriter, TrackedWrite};
use parquet::schema::types::ColumnDescPtr;

/// Most rows in one data page (as the Arrow writer's default page row limit).
pub(super) const PAGE_ROWS: usize = 20_000;

/// A run's dictionary index when its rows are null.
const NULL: u32 = u32::MAX;

/// One dictionary string column of the row group being filled.
#[derive(Debug)]
pub(super) struct KeyChunk {
    descr: ColumnDescPtr,
    nullable: bool,
    /// Min and max per chunk and per page.
    stats: bool,
    /// The distinct values, in order of first use, and their indices.
    dict: Vec<String>,
    index: HashMap<String, u32>,
    /// Runs of rows: (dictionary index or [`NULL`], length).
    runs: Vec<(u32, u32)>,
    rows: usize,
}

impl KeyChunk {
    pub(super) fn new(descr: ColumnDescPtr, stats: bool) -> Self {
        let nullable = descr.max_def_level() > 0;
        KeyChunk { descr, nullable, stats, dict: Vec::new(), index: HashMap::new(), runs: Vec::new(), rows: 0 }
    }

    pub(super) fn rows(&self) -> usize {
        self.rows
    }

    /// Appends rows: `key_of(k)` is the index into `values` of the row's
    /// source key `k`, or `None` for a null row (an error on a column that
    /// cannot be null, or for a key out of range).
    pub(super) fn push<K: Copy + PartialEq>(
        &mut self,
        keys: &[K],
        key_of: impl Fn(K) -> Option<usize>,
        values: &[&str],
    ) -> Result<()> {
        // Source key -> dictionary index, looked up once per source key.
        let mut local: Vec<Option<u32>> = vec![None; values.len()];
        let mut i = 0;
        while i < keys.len() {
            let k = keys[i];
            let run = keys[i..].iter().take_while(|&&x| x == k).count();
            let idx = match key_of(k) {
                None if self.nullable => NULL,
                None => return Err(ParquetError::General(format!("null in column {}", self.descr.name()))),
                Some(s) => {
                    let value = values.get(s).ok_or_else(|| {
                        ParquetError::General(format!("key {s} out of range in column {}", self.descr.name()))
                    })?;
                    match local[s] {
                        Some(d) => d,
                        None => {
                            let d = match self.index.get(*value) {
                                Some(&d) => d,
                                None => {
                                    let d = self.dict.len() as u32;
                                    self.dict.push(value.to_string());
                                    self.index.insert(value.to_string(), d);
                                    d
                                }
                            };
                            local[s] = Some(d);
                            d
                        }
                    }
                }
            };
            self.push_run(idx, run);
            i += run;
        }
        Ok(())
    }

    fn push_run(&mut self, idx: u32, len: usize) {
        self.rows += len;
        let mut len = len;
        // Runs are split so that no run exceeds u32.
        while len > 0 {
            let n = len.min(u32::MAX as usize);
            match self.runs.last_mut() {
                Some((last, l)) if *last == idx && (*l as usize) + n <= u32::MAX as usize => *l += n as u32,
                _ => self.runs.push((idx, n as u32)),
            }
            len -= n;
        }
    }

    /// The chunk's bytes (its first page at offset 0) and what the row
    /// group writer needs to append them.
    pub(super) fn finish(self) -> Result<(Bytes, ColumnCloseResult)> {
        let has_dict = !self.dict.is_empty();
        let bit_width = bit_width(self.dict.len());
        let mut sink = TrackedWrite::new(Vec::new());
        let mut locations = Vec::new();
        let mut col_index = ColumnIndexBuilder::new(PhysicalType::BYTE_ARRAY);
        col_index.set_boundary_order(BoundaryOrder::UNORDERED);
        let mut ascending = true;
        let mut prev_max: Option<u32> = None;
        let mut nulls_total = 0u64;
        let (mut min_all, mut max_all): (Option<u32>, Option<u32>) = (None, None);
        let data_offset;
        {
            let mut pages = SerializedPageWriter::new(&mut sink);
            if has_dict {
                let mut buf = Vec::new();
                for v in &self.dict {
                    buf.extend_from_slice(&(v.len() as u32).to_le_bytes());
                    buf.extend_from_slice(v.as_bytes());
                }
                let n = buf.len();
                let page = Page::DictionaryPage {
                    buf: Bytes::from(buf),
                    num_values: self.dict.len() as u32,
                    encoding: Encoding::PLAIN,
                    is_sorted: false,
                };
                pages.write_page(CompressedPage::new(page, n))?;
            }
            let mut first_data = None;
            let mut run_at = 0usize; // index into runs
            let mut used = 0u32; // rows of runs[run_at] already paged
            let mut first_row = 0usize;
            while first_row < self.rows {
                // Gather this page's runs.
                let mut page_runs: Vec<(u32, u32)> = Vec::new();
                let mut left = PAGE_ROWS.min(self.rows - first_row);
                let page_rows = left;
                while left > 0 {
                    let (idx, len) = self.runs[run_at];
                    let take = ((len - used) as usize).min(left) as u32;
                    page_runs.push((idx, take));
                    used += take;
                    left -= take as usize;
                    if used == len {
                        run_at += 1;
                        used = 0;
                    }
                }
                let nulls: u64 = page_runs.iter().filter(|r| r.0 == NULL).map(|r| r.1 as u64).sum();
                nulls_total += nulls;
                let buf = self.page_data(&page_runs, has_dict, bit_width);
                let n = buf.len();
                let page = Page::DataPage {
                    buf: Bytes::from(buf),
                    num_values: page_rows as u32,
                    encoding: if has_dict { Encoding::RLE_DICTIONARY } else { Encoding::PLAIN },
                    def_level_encoding: Encoding::RLE,
                    rep_level_encoding: Encoding::RLE,
                    statistics: None,
                };
                let spec = pages.write_page(CompressedPage::new(page, n))?;
                first_data.get_or_insert(spec.offset);
                locations.push(PageLocation {
                    offset: spec.offset as i64,
                    compressed_page_size: spec.bytes_written as i32,
                    first_row_index: first_row as i64,
                });
                if self.stats {
                    let (lo, hi) = self.min_max(page_runs.iter().map(|r| r.0));
                    match (lo, hi) {
                        (Some(lo), Some(hi)) => {
                            if prev_max.is_some_and(|p| self.dict[p as usize] > self.dict[lo as usize]) {
                                ascending = false;
                            }
                            prev_max = Some(hi);
                            col_index.append(
                                false,
                                self.dict[lo as usize].as_bytes().to_vec(),
                                self.dict[hi as usize].as_bytes().to_vec(),
                                nulls as i64,
                                None,
                            );
                            min_all = self.min_max([min_all, Some(lo)].into_iter().flatten()).0;
                            max_all = self.min_max([max_all, Some(hi)].into_iter().flatten()).1;
                        }
                        _ => col_index.append(true, Vec::new(), Vec::new(), nulls as i64, None),
                    }
                }
                first_row += page_rows;
            }
            data_offset = first_data.unwrap_or(0) as i64;
            pages.close()?;
        }
        let bytes = Bytes::from(sink.into_inner()?);
        let total = bytes.len() as i64;
        let mut encodings = vec![Encoding::PLAIN, Encoding::RLE];
        if has_dict {
            encodings.push(Encoding::RLE_DICTIONARY);
        }
        let mut meta = ColumnChunkMetaData::builder(self.descr.clone())
            .set_compression(Compression::UNCOMPRESSED)
            .set_encodings(encodings)
            .set_num_values(self.rows as i64)
            .set_total_compressed_size(total)
            .set_total_uncompressed_size(total)
            .set_data_page_offset(data_offset)
            .set_dictionary_page_offset(has_dict.then_some(0));
        let mut column_index = None;
        if self.stats {
            let text = |d: Option<u32>| d.map(|d| ByteArray::from(self.dict[d as usize].as_bytes().to_vec()));
            meta = meta.set_statistics(Statistics::ByteArray(ValueStatistics::new(
                text(min_all),
                text(max_all),
                None,
                Some(nulls_total),
                false,
            )));
            if ascending && has_dict {
                col_index.set_boundary_order(BoundaryOrder::ASCENDING);
            }
            column_index = Some(col_index.build()?);
        }
        let close = ColumnCloseResult {
            bytes_written: total as u64,
            rows_written: self.rows as u64,
            metadata: meta.build()?,
            bloom_filter: None,
            column_index,
            offset_index: Some(OffsetIndexMetaData {
                page_locations: locations,
                unencoded_byte_array_data_bytes: None,
            }),
        };
        Ok((bytes, close))
    }

    /// The smallest and largest value among dictionary indices (nulls skipped).
    fn min_max(&self, idx: impl Iterator<Item = u32>) -> (Option<u32>, Option<u32>) {
        let (mut lo, mut hi): (Option<u32>, Option<u32>) = (None, None);
        for d in idx.filter(|&d| d != NULL) {
            let v = &self.dict[d as usize];
            if lo.is_none_or(|l| *v < self.dict[l as usize]) {
                lo = Some(d);
            }
            if hi.is_none_or(|h| *v > self.dict[h as usize]) {
                hi = Some(d);
            }
        }
        (lo, hi)
    }

    /// One data page's bytes (format v1): the definition levels (length
    /// prefixed, nullable columns only), then the values.
    fn page_data(&self, runs: &[(u32, u32)], has_dict: bool, bit_width: u8) -> Vec<u8> {
        let mut buf = Vec::new();
        if self.nullable {
            let mut levels = Vec::new();
            let mut at = 0;
            while at < runs.len() {
                let defined = runs[at].0 != NULL;
                let mut len = 0u64;
                while at < runs.len() && (runs[at].0 != NULL) == defined {
                    len += runs[at].1 as u64;
                    at += 1;
                }
                rle_run(&mut levels, len, defined as u32, 1);
            }
            buf.extend_from_slice(&(levels.len() as u32).to_le_bytes());
            buf.extend_from_slice(&levels);
        }
        if has_dict {
            buf.push(bit_width);
            // Values of the defined rows only; runs split by nulls merge.
            let mut at = 0;
            let defined: Vec<(u32, u32)> = runs.iter().copied().filter(|r| r.0 != NULL).collect();
            while at < defined.len() {
                let idx = defined[at].0;
                let mut len = 0u64;
                while at < defined.len() && defined[at].0 == idx {
                    len += defined[at].1 as u64;
                    at += 1;
                }
                rle_run(&mut buf, len, idx, bit_width);
            }
        }
        buf
    }
}

/// Bits per dictionary index (at least 1).
fn bit_width(dict_len: usize) -> u8 {
    let max = dict_len.saturating_sub(1) as u64;
    (64 - max.leading_zeros() as u8).max(1)
}

/// One RLE run of the RLE / bit-packing hybrid: the header `len << 1` as a
/// ULEB128 varint, then the value in ceil(bit_width / 8) bytes, little endian.
fn rle_run(out: &mut Vec<u8>, len: u64, value: u32, bit_width: u8) {
    let mut h = len << 1;
    loop {
        let b = (h & 0x7f) as u8;
        h >>= 7;
        if h == 0 {
            out.push(b);
            break;
        }
        out.push(b | 0x80);
    }
    let bytes = (bit_width as usize).div_ceil(8);
    out.extend_from_slice(&value.to_le_bytes()[..bytes]);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_are_encoded_as_the_hybrid_format_says() {
        // 300 rows of value 2 at bit width 2: header 600 = 0xd8 0x04, then one byte.
        let mut out = Vec::new();
        rle_run(&mut out, 300, 2, 2);
        assert_eq!(out, vec![0xd8, 0x04, 0x02]);
        // Bit width 9: two bytes per value.
        out.clear();
        rle_run(&mut out, 1, 0x1ff, 9);
        assert_eq!(out, vec![0x02, 0xff, 0x01]);
        assert_eq!(bit_width(0), 1);
        assert_eq!(bit_width(1), 1);
        assert_eq!(bit_width(2), 1);
        assert_eq!(bit_width(3), 2);
        assert_eq!(bit_width(257), 9);
    }
}
