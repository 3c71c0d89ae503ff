//! Reading a run's `cleaned.parquet` and `provenance.jsonl` (layouts in
//! `docs/outputs.md`) into plain structs. Every error names the file and
//! what is wrong with it.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use arrow_array::cast::AsArray;
use arrow_array::types::{Float64Type, TimestampMicrosecondType};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::{DataType, TimeUnit};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use serde_json::Value;

use super::{parse_fault, EventRecord, QualityError, Row, RunOutput, Status, TagRecord};

/// Reads `dir/cleaned.parquet` and `dir/provenance.jsonl`.
pub fn read_run(dir: &Path) -> Result<RunOutput, QualityError> {
    let rows = read_cleaned(&dir.join("cleaned.parquet"))?;
    let (records, events) = read_provenance(&dir.join("provenance.jsonl"))?;
    Ok(RunOutput { rows, records, events })
}

/// Reads `cleaned.parquet` into rows by tag, each tag's rows sorted by time.
pub fn read_cleaned(path: &Path) -> Result<BTreeMap<String, Vec<Row>>, QualityError> {
    let file = std::fs::File::open(path).map_err(|source| QualityError::Io { path: path.to_path_buf(), source })?;
    let pq =
        |e: parquet::errors::ParquetError| QualityError::Parquet { path: path.to_path_buf(), message: e.to_string() };
    let reader = ParquetRecordBatchReaderBuilder::try_new(file).map_err(pq)?.build().map_err(pq)?;
    let mut out: BTreeMap<String, Vec<Row>> = BTreeMap::new();
    for batch in reader {
        let batch = batch.map_err(|e| QualityError::Parquet { path: path.to_path_buf(), message: e.to_string() })?;
        append_batch(path, &batch, &mut out)?;
    }
    for rows in out.values_mut() {
        rows.sort_by_key(|r| r.ts_us);
    }
    Ok(out)
}

fn append_batch(path: &Path, b: &RecordBatch, out: &mut BTreeMap<String, Vec<Row>>) -> Result<(), QualityError> {
    let col = |name: &str| -> Result<&ArrayRef, QualityError> {
        b.column_by_name(name).ok_or_else(|| column_err(path, name, "missing"))
    };
    let tag = strings(path, "tag", col("tag")?)?;
    let ts = timestamps(path, col("ts")?)?;
    let raw = floats(path, "raw", col("raw")?)?;
    let value = floats(path, "value", col("value")?)?;
    let std = floats(path, "std", col("std")?)?;
    let status = strings(path, "status", col("status")?)?;
    let fault = strings(path, "fault", col("fault")?)?;
    for i in 0..b.num_rows() {
        let Some(t) = &tag[i] else { return Err(column_err(path, "tag", &format!("null in row {i} of a batch"))) };
        let st = status[i].as_deref().and_then(Status::parse).ok_or_else(|| {
            column_err(path, "status", &format!("{:?} is not ok|filled|replaced|rejected", status[i]))
        })?;
        let fault = match fault[i].as_deref() {
            None => None,
            Some(s) => Some(parse_fault(s).ok_or_else(|| column_err(path, "fault", &format!("unknown fault {s:?}")))?),
        };
        let row = Row { ts_us: ts[i], raw: raw[i], value: value[i], std: std[i], status: st, fault };
        match out.get_mut(t.as_str()) {
            Some(v) => v.push(row),
            None => {
                out.insert(t.clone(), vec![row]);
            }
        }
    }
    Ok(())
}

fn column_err(path: &Path, column: &str, what: &str) -> QualityError {
    QualityError::Column { path: path.to_path_buf(), column: column.to_string(), what: what.to_string() }
}

/// A string column, plain or dictionary-encoded (any key type).
fn strings(path: &Path, name: &str, a: &ArrayRef) -> Result<Vec<Option<String>>, QualityError> {
    match a.data_type() {
        DataType::Dictionary(_, v) if **v == DataType::Utf8 => {
            let d = a.as_any_dictionary();
            let values = d.values().as_string::<i32>();
            let keys = d.normalized_keys();
            Ok((0..d.len()).map(|i| d.is_valid(i).then(|| values.value(keys[i]).to_string())).collect())
        }
        DataType::Utf8 => {
            let s = a.as_string::<i32>();
            Ok((0..s.len()).map(|i| s.is_valid(i).then(|| s.value(i).to_string())).collect())
        }
        DataType::LargeUtf8 => {
            let s = a.as_string::<i64>();
            Ok((0..s.len()).map(|i| s.is_valid(i).then(|| s.value(i).to_string())).collect())
        }
        other => Err(column_err(path, name, &format!("expected strings, found {other}"))),
    }
}

fn floats(path: &Path, name: &str, a: &ArrayRef) -> Result<Vec<Option<f64>>, QualityError> {
    if a.data_type() != &DataType::Float64 {
        return Err(column_err(path, name, &format!("expected float64, found {}", a.data_type())));
    }
    let f = a.as_primitive::<Float64Type>();
    Ok((0..f.len()).map(|i| f.is_valid(i).then(|| f.value(i))).collect())
}

fn timestamps(path: &Path, a: &ArrayRef) -> Result<Vec<i64>, QualityError> {
    match a.data_type() {
        DataType::Timestamp(TimeUnit::Microsecond, _) => {
            let t = a.as_primitive::<TimestampMicrosecondType>();
            if t.null_count() > 0 {
                return Err(column_err(path, "ts", "has nulls"));
            }
            Ok(t.values().to_vec())
        }
        other => Err(column_err(path, "ts", &format!("expected timestamp[us], found {other}"))),
    }
}

/// Reads `provenance.jsonl`: the tag records by tag, and the events in file order.
#[allow(clippy::type_complexity)]
pub fn read_provenance(path: &Path) -> Result<(BTreeMap<String, TagRecord>, Vec<EventRecord>), QualityError> {
    let text = std::fs::read_to_string(path).map_err(|source| QualityError::Io { path: path.to_path_buf(), source })?;
    let mut records = BTreeMap::new();
    let mut events = Vec::new();
    for (i, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let at = Line { path, line: i + 1 };
        let v: Value = serde_json::from_str(line).map_err(|e| at.err(&format!("not JSON: {e}")))?;
        match v.get("record").and_then(Value::as_str) {
            Some("tag") => {
                let r = tag_record(&v, &at)?;
                records.insert(r.tag.clone(), r);
            }
            Some("event") => events.push(event_record(&v, &at)?),
            Some(_) => {}
            None => return Err(at.err("no `record` field")),
        }
    }
    Ok((records, events))
}

struct Line<'a> {
    path: &'a Path,
    line: usize,
}

impl Line<'_> {
    fn err(&self, what: &str) -> QualityError {
        QualityError::Line { path: PathBuf::from(self.path), line: self.line, what: what.to_string() }
    }

    fn str(&self, v: &Value, field: &str) -> Result<String, QualityError> {
        v.get(field)
            .and_then(Value::as_str)
            .map(str::to_string)
            .ok_or_else(|| self.err(&format!("`{field}` is not a string")))
    }

    fn opt_str(&self, v: &Value, field: &str) -> Result<Option<String>, QualityError> {
        match v.get(field) {
            None | Some(Value::Null) => Ok(None),
            Some(Value::String(s)) => Ok(Some(s.clone())),
            Some(_) => Err(self.err(&format!("`{field}` is neither a string nor null"))),
        }
    }

    fn opt_f64(&self, v: &Value, field: &str) -> Result<Option<f64>, QualityError> {
        match v.get(field) {
            None | Some(Value::Null) => Ok(None),
            Some(x) => x.as_f64().map(Some).ok_or_else(|| self.err(&format!("`{field}` is neither a number nor null"))),
        }
    }

    fn strings(&self, v: &Value, field: &str) -> Result<Vec<String>, QualityError> {
        match v.get(field) {
            None | Some(Value::Null) => Ok(Vec::new()),
            Some(Value::Array(a)) => a
                .iter()
                .map(|x| {
                    x.as_str().map(str::to_string).ok_or_else(|| self.err(&format!("`{field}` holds a non-string")))
                })
                .collect(),
            Some(_) => Err(self.err(&format!("`{field}` is not a list"))),
        }
    }

    fn time(&self, v: &Value, field: &str) -> Result<i64, QualityError> {
        let s = self.str(v, field)?;
        chrono::DateTime::parse_from_rfc3339(&s)
            .map(|t| t.timestamp_micros())
            .map_err(|e| self.err(&format!("`{field}` {s:?} is not an RFC 3339 time: {e}")))
    }
}

fn tag_record(v: &Value, at: &Line<'_>) -> Result<TagRecord, QualityError> {
    let extra = match v.get("extra") {
        None | Some(Value::Null) => serde_json::Map::new(),
        Some(Value::Object(m)) => m.clone(),
        Some(_) => return Err(at.err("`extra` is not an object")),
    };
    Ok(TagRecord {
        tag: at.str(v, "tag")?,
        outcome: at.str(v, "outcome")?,
        error: at.opt_str(v, "error")?,
        group: at.opt_str(v, "group")?,
        steps: at.strings(v, "steps")?,
        model: at.opt_str(v, "model")?,
        extra,
        notes: at.strings(v, "notes")?,
    })
}

fn event_record(v: &Value, at: &Line<'_>) -> Result<EventRecord, QualityError> {
    let fault = match at.opt_str(v, "fault")? {
        None => None,
        Some(s) => Some(parse_fault(&s).ok_or_else(|| at.err(&format!("unknown fault {s:?}")))?),
    };
    let rows = v.get("rows").and_then(Value::as_u64).ok_or_else(|| at.err("`rows` is not a count"))?;
    Ok(EventRecord {
        tag: at.str(v, "tag")?,
        from_us: at.time(v, "from")?,
        to_us: at.time(v, "to")?,
        action: at.str(v, "action")?,
        fault,
        step: at.opt_str(v, "step")?,
        statistic: at.opt_f64(v, "statistic")?,
        threshold: at.opt_f64(v, "threshold")?,
        rows,
    })
}
