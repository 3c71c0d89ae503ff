//! Writers of the demo's files: the historian export (long-format Parquet
//! with local wall-clock times, as many historians export) and the truth
//! (Parquet values, JSON events).

use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::{
    ArrayRef, Float64Array, Int32Array, RecordBatch, StringArray, TimestampMicrosecondArray, TimestampMillisecondArray,
};
use arrow_schema::{DataType, Field, Schema, TimeUnit};
use chrono::{Offset as _, TimeZone as _};
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression, Encoding, ZstdLevel};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use parquet::schema::types::ColumnPath;
use serde_json::{json, Map, Value};

use crate::io::{format_ts_us, BoxError};
use crate::series::Sampling;

use super::{DemoData, FaultEvent, SCENARIO, SITE_TIMEZONE, TRUTH_EVENTS_FILE, TRUTH_VALUES_FILE};

/// What can go wrong when writing the demo's files.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum DemoError {
    /// A file or directory cannot be created or written.
    #[error("{}: cannot write: {source}", path.display())]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The Parquet or Arrow library refused the data.
    #[error("{}: cannot encode Parquet: {source}", path.display())]
    Parquet {
        path: PathBuf,
        #[source]
        source: BoxError,
    },
    /// The events cannot be encoded as JSON.
    #[error("{}: cannot encode JSON: {source}", path.display())]
    Json {
        path: PathBuf,
        #[source]
        source: serde_json::Error,
    },
}

/// Writes the historian export: long-format Parquet with columns `tag`
/// (string), `ts` (`timestamp[ms]` without time zone, holding the local
/// wall-clock time in Europe/Berlin), `value` (float64) and `quality`
/// (int32, classic OPC quality byte); sorted by tag then time; zstd.
///
/// A shift across the autumn clock change would give two rows of a tag the
/// same local time, as such exports do; the default shift does not cross one.
/// The file is written beside its final name and renamed when complete.
pub fn write_export(data: &DemoData, path: &Path) -> Result<(), DemoError> {
    let schema = Arc::new(Schema::new(vec![
        Field::new("tag", DataType::Utf8, false),
        Field::new("ts", DataType::Timestamp(TimeUnit::Millisecond, None), false),
        Field::new("value", DataType::Float64, false),
        Field::new("quality", DataType::Int32, false),
    ]));
    let rows = &data.rows;
    let columns: Vec<ArrayRef> = vec![
        Arc::new(StringArray::from_iter_values(rows.iter().map(|r| r.tag))),
        Arc::new(TimestampMillisecondArray::from_iter_values(rows.iter().map(|r| local_wall_ms(r.ts_us)))),
        Arc::new(Float64Array::from_iter_values(rows.iter().map(|r| r.value))),
        Arc::new(Int32Array::from_iter_values(rows.iter().map(|r| i32::from(r.quality)))),
    ];
    let meta = vec![
        KeyValue::new("tagwright.demo.scenario".into(), format!("{SCENARIO} (fictional)")),
        KeyValue::new("tagwright.demo.seed".into(), data.options.seed.to_string()),
        KeyValue::new("tagwright.demo.fault_scale".into(), data.options.fault_scale.to_string()),
        KeyValue::new("tagwright.demo.ts".into(), format!("local wall-clock time, {}", SITE_TIMEZONE.name())),
    ];
    write_parquet(path, schema, columns, "ts", meta)
}

/// Writes the truth into `dir` (created if missing): `truth_values.parquet`
/// (`tag` string, `ts` `timestamp[us, UTC]`, `true_value` float64: every tag
/// at every scan of its grid, sorted by tag then time) and
/// `truth_events.json` (the faults, process events, gaps, uncertain
/// stretches, redundant groups and exception-reported tags; times RFC 3339 UTC).
pub fn write_truth(data: &DemoData, dir: &Path) -> Result<(), DemoError> {
    std::fs::create_dir_all(dir).map_err(|source| DemoError::Io { path: dir.to_path_buf(), source })?;
    let v = &data.truth.values;
    let schema = Arc::new(Schema::new(vec![
        Field::new("tag", DataType::Utf8, false),
        Field::new("ts", DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())), false),
        Field::new("true_value", DataType::Float64, false),
    ]));
    let columns: Vec<ArrayRef> = vec![
        Arc::new(StringArray::from_iter_values(v.iter().map(|r| r.tag))),
        Arc::new(TimestampMicrosecondArray::from_iter_values(v.iter().map(|r| r.ts_us)).with_timezone("UTC")),
        Arc::new(Float64Array::from_iter_values(v.iter().map(|r| r.value))),
    ];
    let meta = vec![
        KeyValue::new("tagwright.demo.scenario".into(), format!("{SCENARIO} (fictional)")),
        KeyValue::new("tagwright.demo.seed".into(), data.options.seed.to_string()),
    ];
    write_parquet(&dir.join(TRUTH_VALUES_FILE), schema, columns, "true_value", meta)?;

    let path = dir.join(TRUTH_EVENTS_FILE);
    let mut text = serde_json::to_string_pretty(&events_json(data))
        .map_err(|source| DemoError::Json { path: path.clone(), source })?;
    text.push('\n');
    atomic_write(&path, |f| {
        std::io::Write::write_all(f, text.as_bytes()).map_err(|source| DemoError::Io { path: path.clone(), source })
    })
}

/// The events document (see `docs/demo.md` for its layout).
fn events_json(data: &DemoData) -> Value {
    let o = &data.options;
    let units = |tag: &str| data.tag(tag).map_or("", |t| t.units);
    let faults: Vec<Value> = data.truth.faults.iter().map(|f| fault_json(f, units(f.tag))).collect();
    let process: Vec<Value> = data
        .truth
        .process
        .iter()
        .map(|e| {
            json!({
                "kind": e.kind,
                "from": format_ts_us(e.from_us),
                "to": format_ts_us(e.to_us),
                "size": e.size,
                "description": e.description,
                "tags": e.tags,
            })
        })
        .collect();
    let gaps: Vec<Value> = data
        .truth
        .gaps
        .iter()
        .map(|g| {
            json!({
                "from": format_ts_us(g.from_us),
                "to": format_ts_us(g.to_us),
                "minutes": (g.to_us - g.from_us) as f64 / 60e6,
                "rows": g.rows,
                "cause": g.cause,
                "tags": g.tags,
            })
        })
        .collect();
    let uncertain: Vec<Value> = data
        .truth
        .uncertain
        .iter()
        .map(|u| {
            json!({
                "tag": u.tag,
                "from": format_ts_us(u.from_us),
                "to": format_ts_us(u.to_us),
                "quality": u.quality,
                "rows": u.rows,
                "cause": u.cause,
            })
        })
        .collect();
    let groups: Vec<Value> = data
        .truth
        .groups
        .iter()
        .map(|g| json!({"name": g.name, "kind": "redundant", "members": g.members, "trusted": g.trusted}))
        .collect();
    let exception: Vec<Value> = data
        .tags
        .iter()
        .filter_map(|t| match t.sampling {
            Sampling::Exception { deadband } => Some(json!({
                "tag": t.name,
                "deadband": deadband,
                "units": t.units,
                "scan_period_s": t.period_us / 1_000_000,
                "scans": data.truth_of(t.name).len(),
                "rows": data.rows_of(t.name).len(),
            })),
            Sampling::Regular => None,
        })
        .collect();
    json!({
        "scenario": format!("{SCENARIO} (fictional)"),
        "seed": o.seed,
        "fault_scale": o.fault_scale,
        "hours": o.hours,
        "timezone": SITE_TIMEZONE.name(),
        "start_local": o.start.format("%Y-%m-%dT%H:%M:%S").to_string(),
        "start": format_ts_us(data.start_us),
        "end": format_ts_us(data.end_us),
        "tags": data.tags.len(),
        "rows": data.rows.len(),
        "faults": faults,
        "process_events": process,
        "gaps": gaps,
        "uncertain": uncertain,
        "groups": groups,
        "exception_tags": exception,
    })
}

fn fault_json(f: &FaultEvent, units: &str) -> Value {
    let mut m = Map::new();
    m.insert("tag".into(), json!(f.tag));
    m.insert("kind".into(), json!(f.kind.as_str()));
    m.insert("from".into(), json!(format_ts_us(f.from_us)));
    m.insert("to".into(), json!(format_ts_us(f.to_us)));
    m.insert("size".into(), json!(f.size));
    m.insert("units".into(), json!(units));
    if let Some(v) = f.value {
        m.insert("value".into(), json!(v));
    }
    if let Some(r) = f.rate_per_hour {
        m.insert("rate_per_hour".into(), json!(r));
    }
    if let Some(b) = f.bias_end {
        m.insert("bias_end".into(), json!(b));
    }
    m.insert("rows".into(), json!(f.rows));
    m.insert("note".into(), json!(f.note));
    Value::Object(m)
}

/// Local wall-clock time of a UTC instant, as milliseconds of a naive timestamp.
fn local_wall_ms(ts_us: i64) -> i64 {
    let offset_s = chrono::DateTime::from_timestamp_micros(ts_us)
        .map_or(0, |t| SITE_TIMEZONE.offset_from_utc_datetime(&t.naive_utc()).fix().local_minus_utc());
    ts_us.div_euclid(1000) + i64::from(offset_s) * 1000
}

/// One Parquet file from one batch: zstd; the time column delta-encoded
/// and the `float_column` byte-stream-split, both without dictionary.
fn write_parquet(
    path: &Path,
    schema: Arc<Schema>,
    columns: Vec<ArrayRef>,
    float_column: &str,
    meta: Vec<KeyValue>,
) -> Result<(), DemoError> {
    let perr = |e: BoxError| DemoError::Parquet { path: path.to_path_buf(), source: e };
    let batch = RecordBatch::try_new(schema.clone(), columns).map_err(|e| perr(Box::new(e)))?;
    let props = WriterProperties::builder()
        .set_compression(Compression::ZSTD(ZstdLevel::try_new(3).unwrap_or_default()))
        .set_column_dictionary_enabled(ColumnPath::from("ts"), false)
        .set_column_encoding(ColumnPath::from("ts"), Encoding::DELTA_BINARY_PACKED)
        .set_column_dictionary_enabled(ColumnPath::from(float_column), false)
        .set_column_encoding(ColumnPath::from(float_column), Encoding::BYTE_STREAM_SPLIT)
        .set_key_value_metadata(Some(meta))
        .build();
    atomic_write(path, |file| {
        let mut w = ArrowWriter::try_new(file, schema, Some(props)).map_err(|e| perr(Box::new(e)))?;
        w.write(&batch).map_err(|e| perr(Box::new(e)))?;
        w.close().map_err(|e| perr(Box::new(e)))?;
        Ok(())
    })
}

/// Writes through `write` into a temporary file beside `path`, then renames
/// it to `path`; on failure the temporary file is removed.
fn atomic_write(path: &Path, write: impl FnOnce(&mut File) -> Result<(), DemoError>) -> Result<(), DemoError> {
    let io = |source| DemoError::Io { path: path.to_path_buf(), source };
    let mut name = path.file_name().map(|n| n.to_os_string()).unwrap_or_default();
    name.push(".tmp");
    let tmp = path.with_file_name(name);
    let result = File::create(&tmp).map_err(io).and_then(|mut f| {
        write(&mut f)?;
        f.sync_all().map_err(io)
    });
    let result = result.and_then(|()| std::fs::rename(&tmp, path).map_err(io));
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}
