//! Long-format Parquet input: the first pass (runs of each tag, quality
//! coding) and reads of selected runs with a row selection.

use std::collections::HashMap;
use std::path::Path;
use std::sync::Arc;

use arrow_array::RecordBatch;
use arrow_schema::{DataType, Field, Schema, SchemaRef};
use parquet::arrow::arrow_reader::{
    ArrowReaderMetadata, ArrowReaderOptions, ParquetRecordBatchReaderBuilder, RowSelection, RowSelector,
};
use parquet::arrow::ProjectionMask;
use parquet::file::metadata::PageIndexPolicy;

use super::cols::{
    is_integer, is_numeric, is_string_like, is_time, IntCol, QualCol, TextCol, TimeCol, ValueCol, QUALITY_TYPES,
    TAG_TYPES, TIME_TYPES, VALUE_TYPES,
};
use super::input::{Chunk, LongIndex, Run, Stamp};
use super::long::{open_file, quiet_panics};
use super::quality::{QualityMap, RawQuality};
use super::{IoError, Result};
use crate::pipeline::{InputSpec, QualityCoding};
use crate::series::Quality;

/// Rows per record batch when reading.
const BATCH_ROWS: usize = 64 * 1024;

/// A long Parquet file after the first pass.
#[derive(Debug)]
pub(crate) struct ParquetLong {
    meta: ArrowReaderMetadata,
    stamp: Stamp,
    /// Root column indices.
    time: usize,
    value: usize,
    quality: Option<(usize, QualityMap)>,
    /// Rows of each row group.
    group_rows: Vec<u64>,
}

/// The error for a damaged file (or a panic of the decoder).
pub(super) fn corrupt(path: &Path, e: impl Into<super::BoxError>) -> IoError {
    IoError::CorruptParquet { path: path.to_path_buf(), source: e.into() }
}

/// Runs `f`, turning a decoder panic into [`IoError::CorruptParquet`].
pub(super) fn guarded<T>(path: &Path, f: impl FnOnce() -> Result<T>) -> Result<T> {
    quiet_panics(f).unwrap_or_else(|m| Err(corrupt(path, format!("the Parquet decoder failed: {m}"))))
}

/// Opens a Parquet file's metadata (with the offset index where present,
/// so row selections skip whole pages).
pub(super) fn load(path: &Path) -> Result<(ArrowReaderMetadata, Stamp)> {
    let file = open_file(path)?;
    let stamp = Stamp::of(&file, path)?;
    let opts = ArrowReaderOptions::new().with_offset_index_policy(PageIndexPolicy::Optional);
    let meta = ArrowReaderMetadata::load(&file, opts).map_err(|e| corrupt(path, e))?;
    Ok((meta, stamp))
}

/// Finds a top-level column by name and checks its type.
pub(super) fn find_column(
    path: &Path,
    schema: &Schema,
    role: &'static str,
    name: &str,
    ok: fn(&DataType) -> bool,
    expected: &'static str,
) -> Result<usize> {
    let (i, field) =
        schema.fields().iter().enumerate().find(|(_, f)| f.name() == name).ok_or_else(|| IoError::MissingColumn {
            path: path.to_path_buf(),
            role,
            column: name.to_string(),
            available: schema.fields().iter().map(|f| f.name().clone()).collect(),
        })?;
    if !ok(field.data_type()) {
        return Err(IoError::ColumnType {
            path: path.to_path_buf(),
            role,
            column: name.to_string(),
            found: field.data_type().to_string(),
            expected,
        });
    }
    Ok(i)
}

/// Metadata that reads a plain string column as a dictionary, so the first
/// pass compares integer keys rather than strings (the metadata unchanged
/// when that is not possible).
fn with_tag_dictionary(meta: ArrowReaderMetadata, i_tag: usize) -> ArrowReaderMetadata {
    let schema = meta.schema();
    let Some(field) = schema.fields().get(i_tag) else { return meta };
    let dt = field.data_type();
    if !matches!(dt, DataType::Utf8 | DataType::LargeUtf8) {
        return meta;
    }
    let fields: Vec<Arc<Field>> = schema
        .fields()
        .iter()
        .enumerate()
        .map(|(i, f)| {
            if i == i_tag {
                Arc::new(
                    f.as_ref()
                        .clone()
                        .with_data_type(DataType::Dictionary(Box::new(DataType::Int32), Box::new(dt.clone()))),
                )
            } else {
                f.clone()
            }
        })
        .collect();
    let hint: SchemaRef = Arc::new(Schema::new_with_metadata(fields, schema.metadata().clone()));
    let opts = ArrowReaderOptions::new().with_schema(hint);
    ArrowReaderMetadata::try_new(meta.metadata().clone(), opts).unwrap_or(meta)
}

/// The first pass over a long Parquet file: column checks, runs of each
/// tag (reading only the tag column, and the quality column when `auto`
/// must find its largest code), and the row count.
pub(super) fn open(path: &Path, spec: &InputSpec) -> Result<(ParquetLong, LongIndex, u64)> {
    guarded(path, || open_unguarded(path, spec))
}

fn open_unguarded(path: &Path, spec: &InputSpec) -> Result<(ParquetLong, LongIndex, u64)> {
    let (meta, stamp) = load(path)?;
    let schema = meta.schema().clone();
    let c = &spec.columns;
    let i_tag = find_column(path, &schema, "tag", &c.tag, is_string_like, TAG_TYPES)?;
    let time = find_column(path, &schema, "time", &c.time, is_time, TIME_TYPES)?;
    let value = find_column(path, &schema, "value", &c.value, is_numeric, VALUE_TYPES)?;
    let q_col = match &c.quality {
        None => None,
        Some(name) => {
            Some(find_column(path, &schema, "quality", name, |t| is_integer(t) || is_string_like(t), QUALITY_TYPES)?)
        }
    };
    // The quality mapping, or the need to scan for `auto`.
    let mut quality: Option<(usize, QualityMap)> = None;
    let mut scan_quality = None;
    if let (Some(i), Some(name)) = (q_col, &c.quality) {
        let dt = schema.field(i).data_type();
        if is_integer(dt) {
            match (&spec.quality, IntCol::type_max(dt)) {
                (QualityCoding::Auto, None) => scan_quality = Some(i),
                (coding, max) => {
                    let map = QualityMap::for_integers(coding, max).map_err(|_| IoError::ColumnType {
                        path: path.to_path_buf(),
                        role: "quality",
                        column: name.clone(),
                        found: dt.to_string(),
                        expected: "text, since the pipeline reads quality as words",
                    })?;
                    quality = Some((i, map));
                }
            }
        } else {
            quality = Some((i, QualityMap::for_text(&spec.quality)));
        }
    }

    let meta = with_tag_dictionary(meta, i_tag);
    let group_rows: Vec<u64> =
        meta.metadata().row_groups().iter().map(|g| u64::try_from(g.num_rows()).unwrap_or(0)).collect();
    let file = open_file(path)?;
    let mut roots = vec![i_tag];
    roots.extend(scan_quality);
    let mask = ProjectionMask::roots(meta.parquet_schema(), roots.iter().copied());
    let reader = ParquetRecordBatchReaderBuilder::new_with_metadata(file, meta.clone())
        .with_projection(mask)
        .with_batch_size(BATCH_ROWS)
        .build()
        .map_err(|e| corrupt(path, e))?;
    let tag_pos = position(&roots, i_tag);
    let q_pos = scan_quality.map(|q| position(&roots, q));

    let mut index = LongIndex::default();
    let mut base = 0u64;
    let mut q_max: Option<i64> = None;
    for batch in reader {
        let batch = batch.map_err(|e| corrupt(path, e))?;
        let col = batch.column(tag_pos);
        let tags =
            TextCol::new(col.as_ref()).ok_or_else(|| type_error(path, "tag", &c.tag, col.data_type(), TAG_TYPES))?;
        let n = batch.num_rows();
        let mut i = 0;
        while i < n {
            let row = base + i as u64;
            match tags.get(i) {
                Some(t) if !t.is_empty() => index.push(t, row),
                Some(_) => return Err(bad_row(path, row + 1, &c.tag, "the tag is empty".into())),
                None => return Err(bad_row(path, row + 1, &c.tag, "the tag is null".into())),
            }
            // The rows after it with the same dictionary key hold the same tag.
            let end = tags.run_end(i, n);
            index.extend_last(end - i - 1);
            i = end;
        }
        if let (Some(p), Some(name)) = (q_pos, &c.quality) {
            let qc = batch.column(p);
            let ints = IntCol::new(qc.as_ref())
                .ok_or_else(|| type_error(path, "quality", name, qc.data_type(), QUALITY_TYPES))?;
            for i in 0..batch.num_rows() {
                if let Some(v) = ints.get(i) {
                    if v < 0 {
                        return Err(bad_row(path, base + i as u64 + 1, name, format!("quality code {v} is negative")));
                    }
                    q_max = Some(q_max.map_or(v, |m| m.max(v)));
                }
            }
        }
        base += batch.num_rows() as u64;
    }
    if base == 0 {
        return Err(IoError::Empty { path: path.to_path_buf(), what: "no data rows" });
    }
    if let Some(i) = scan_quality {
        quality = Some((i, QualityMap::for_integers(&QualityCoding::Auto, q_max).unwrap_or(QualityMap::OpcByte)));
    }
    Ok((ParquetLong { meta, stamp, time, value, quality, group_rows }, index, base))
}

fn position(roots: &[usize], root: usize) -> usize {
    let mut sorted = roots.to_vec();
    sorted.sort_unstable();
    sorted.dedup();
    sorted.iter().position(|&r| r == root).unwrap_or(0)
}

fn type_error(path: &Path, role: &'static str, name: &str, found: &DataType, expected: &'static str) -> IoError {
    IoError::ColumnType { path: path.to_path_buf(), role, column: name.to_string(), found: found.to_string(), expected }
}

pub(super) fn bad_row(path: &Path, row: u64, column: &str, reason: String) -> IoError {
    IoError::BadRow { path: path.to_path_buf(), row, column: Some(column.to_string()), reason }
}

/// The row groups touched by `runs` (sorted by start) and the selection of
/// their rows, relative to those row groups.
pub(super) fn selection(group_rows: &[u64], runs: &[Run]) -> (Vec<usize>, RowSelection) {
    let mut groups = Vec::new();
    let mut selectors: Vec<RowSelector> = Vec::new();
    let mut g_start = 0u64;
    let mut j = 0;
    for (g, &n) in group_rows.iter().enumerate() {
        let g_end = g_start + n;
        let mut pos = g_start;
        let mut local = Vec::new();
        while let Some(r) = runs.get(j) {
            if r.start >= g_end {
                break;
            }
            let (s, e) = (r.start.max(g_start), r.end().min(g_end));
            if e > s {
                if s > pos {
                    local.push(RowSelector::skip((s - pos) as usize));
                }
                local.push(RowSelector::select((e - s) as usize));
                pos = e;
            }
            if r.end() <= g_end {
                j += 1;
            } else {
                break;
            }
        }
        if !local.is_empty() {
            if pos < g_end {
                local.push(RowSelector::skip((g_end - pos) as usize));
            }
            groups.push(g);
            selectors.extend(local);
        }
        g_start = g_end;
    }
    (groups, RowSelection::from(selectors))
}

impl ParquetLong {
    /// Reads the runs `selected` (indices into `runs`, sorted by start) and
    /// returns each tag's rows. Only the time, value and quality columns
    /// are decoded; when every run is selected no selection is applied.
    pub(super) fn read(
        &self,
        path: &Path,
        spec: &InputSpec,
        runs: &[Run],
        selected: &[usize],
    ) -> Result<HashMap<u32, Chunk>> {
        guarded(path, || self.read_unguarded(path, spec, runs, selected))
    }

    fn read_unguarded(
        &self,
        path: &Path,
        spec: &InputSpec,
        runs: &[Run],
        selected: &[usize],
    ) -> Result<HashMap<u32, Chunk>> {
        let chosen: Vec<Run> = selected.iter().filter_map(|&i| runs.get(i).copied()).collect();
        let mut out: HashMap<u32, Chunk> = HashMap::new();
        for r in &chosen {
            let n = out.get(&r.tag).map_or(0, Chunk::len) + r.len as usize;
            out.entry(r.tag).or_insert_with(|| Chunk::with_capacity(n));
        }
        let file = self.stamp.reopen(path)?;
        let mut roots = vec![self.time, self.value];
        roots.extend(self.quality.as_ref().map(|q| q.0));
        let mask = ProjectionMask::roots(self.meta.parquet_schema(), roots.iter().copied());
        let mut builder = ParquetRecordBatchReaderBuilder::new_with_metadata(file, self.meta.clone())
            .with_projection(mask)
            .with_batch_size(BATCH_ROWS);
        if chosen.len() < runs.len() {
            let (groups, sel) = selection(&self.group_rows, &chosen);
            builder = builder.with_row_groups(groups).with_row_selection(sel);
        }
        let reader = builder.build().map_err(|e| corrupt(path, e))?;
        let pos = Positions {
            time: position(&roots, self.time),
            value: position(&roots, self.value),
            quality: self.quality.as_ref().map(|q| position(&roots, q.0)),
        };
        let mut cursor = (0usize, 0u64);
        for batch in reader {
            let batch = batch.map_err(|e| corrupt(path, e))?;
            self.take_batch(path, spec, &batch, &pos, &chosen, &mut cursor, &mut out)?;
        }
        if cursor.0 < chosen.len() {
            return Err(corrupt(path, "the file has fewer rows than when it was opened"));
        }
        Ok(out)
    }

    /// Hands the rows of one batch to the chunks of their runs.
    #[allow(clippy::too_many_arguments)]
    fn take_batch(
        &self,
        path: &Path,
        spec: &InputSpec,
        batch: &RecordBatch,
        pos: &Positions,
        runs: &[Run],
        cursor: &mut (usize, u64),
        out: &mut HashMap<u32, Chunk>,
    ) -> Result<()> {
        let c = &spec.columns;
        let tc = batch.column(pos.time);
        let times = TimeCol::new(tc.as_ref(), spec.epoch_unit)
            .ok_or_else(|| type_error(path, "time", &c.time, tc.data_type(), TIME_TYPES))?;
        let vc = batch.column(pos.value);
        let values = ValueCol::new(vc.as_ref())
            .ok_or_else(|| type_error(path, "value", &c.value, vc.data_type(), VALUE_TYPES))?;
        let quality = match (pos.quality, &self.quality) {
            (Some(p), Some((_, map))) => {
                let qc = batch.column(p);
                let col = QualCol::new(qc.as_ref()).ok_or_else(|| {
                    type_error(path, "quality", c.quality.as_deref().unwrap_or(""), qc.data_type(), QUALITY_TYPES)
                })?;
                Some((col, map))
            }
            _ => None,
        };
        let n = batch.num_rows();
        let mut i = 0;
        while i < n {
            let Some(run) = runs.get(cursor.0) else {
                return Err(corrupt(path, "the file has more rows than when it was opened"));
            };
            let take = ((run.len - cursor.1) as usize).min(n - i);
            let Some(chunk) = out.get_mut(&run.tag) else { break };
            let first_row = run.start + cursor.1 + 1;
            let from = chunk.ts.len();
            chunk.row.push_run(from, first_row, take);
            chunk.note_local(times.local, take);
            if let Err(k) = times.extend_into(&mut chunk.ts, i, take) {
                let row = first_row + (k - i) as u64;
                return Err(match times.micros(k) {
                    Err(raw) => bad_time(path, row, &c.time, &raw, "out of range (beyond i64 microseconds since 1970)"),
                    _ => bad_time(path, row, &c.time, "null", "the time is null"),
                });
            }
            values.extend_into(&mut chunk.value, i, take);
            chunk.scan_appended(from);
            match &quality {
                None => chunk.quality.extend(std::iter::repeat_n(Quality::Good, take)),
                Some((col, map)) => {
                    // Codes repeat: map each run of equal cells once (and a
                    // code equal to the last run's without mapping it again).
                    let mut last: Option<(RawQuality, Quality)> = None;
                    let mut k = i;
                    while k < i + take {
                        let raw = col.get(k);
                        let q = match last {
                            Some((r, q)) if r == raw => q,
                            _ => {
                                let q = map.map(raw).map_err(|reason| {
                                    bad_row(
                                        path,
                                        first_row + (k - i) as u64,
                                        c.quality.as_deref().unwrap_or(""),
                                        reason,
                                    )
                                })?;
                                last = Some((raw, q));
                                q
                            }
                        };
                        let end = col.run_end(k, i + take);
                        chunk.quality.extend(std::iter::repeat_n(q, end - k));
                        k = end;
                    }
                }
            }
            cursor.1 += take as u64;
            i += take;
            if cursor.1 == run.len {
                *cursor = (cursor.0 + 1, 0);
            }
        }
        Ok(())
    }
}

/// Positions of the projected columns in a batch.
struct Positions {
    time: usize,
    value: usize,
    quality: Option<usize>,
}

pub(super) fn bad_time(path: &Path, row: u64, column: &str, text: &str, reason: &str) -> IoError {
    IoError::BadTime {
        path: path.to_path_buf(),
        row,
        column: column.to_string(),
        text: text.to_string(),
        reason: reason.to_string(),
    }
}
