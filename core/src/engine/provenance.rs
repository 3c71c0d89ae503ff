//! `provenance.jsonl`: one JSON object per line. First the `run` record, then
//! for each tag (in output order) its `tag` record followed by its `event`
//! records. Field names are documented in `docs/outputs.md`.

use std::collections::BTreeMap;
use std::io::{Seek, Write};
use std::path::{Path, PathBuf};

use chrono::{DateTime, SecondsFormat, Utc};
use serde_json::{json, Map, Value};

use super::{Event, RunOptions, RunOutcome, TagResult};
use crate::io::{InputSet, IoError};
use crate::pipeline::PipelineSpec;

/// The caution every output carries.
pub const CAUTION: &str = "tagwright's outputs are estimates for reporting and analysis. They do not replace \
licensed safety-instrumented systems (IEC 61511), instrument maintenance or site procedures, and must not be \
used for control or protection. Follow local codes and licensed practice.";

/// RFC 3339 UTC with as many fraction digits as needed.
pub fn time_text(us: i64) -> String {
    DateTime::<Utc>::from_timestamp_micros(us)
        .map(|t| t.to_rfc3339_opts(SecondsFormat::AutoSi, true))
        .unwrap_or_else(|| format!("{us}us"))
}

fn num(v: f64) -> Value {
    serde_json::Number::from_f64(v).map(Value::Number).unwrap_or(Value::Null)
}

/// The tag and event lines, in output order. They go to a spill file in
/// the staging directory as they come (the run record, written first in
/// `provenance.jsonl`, is known only at the end), so the memory a run holds
/// does not grow with the number of tags and events.
pub(super) struct Body {
    spill: PathBuf,
    out: std::io::BufWriter<std::fs::File>,
    /// The first write error, reported by [`Body::write`].
    error: Option<std::io::Error>,
}

impl Body {
    pub(super) fn new(spill: PathBuf) -> Result<Self, IoError> {
        let f = std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(&spill)
            .map_err(|e| IoError::Write { path: spill.clone(), source: e.into() })?;
        Ok(Body { spill, out: std::io::BufWriter::with_capacity(1 << 16, f), error: None })
    }

    fn push(&mut self, v: &Value) {
        if self.error.is_some() {
            return;
        }
        // Serialising a Value built here cannot fail.
        let line = serde_json::to_vec(v).unwrap_or_default();
        if let Err(e) = self.out.write_all(&line).and_then(|()| self.out.write_all(b"\n")) {
            self.error = Some(e);
        }
    }

    pub(super) fn tag(&mut self, r: &TagResult, by_status: &[u64; 4], faults: &BTreeMap<&'static str, u64>) {
        let rows: Map<String, Value> =
            super::status_names().iter().zip(by_status).map(|(k, v)| (k.to_string(), json!(v))).collect();
        let params: Map<String, Value> = r.work_report.params.iter().map(|(k, v)| (k.clone(), num(*v))).collect();
        let mut rec = json!({
            "record": "tag",
            "tag": r.table.tag,
            "outcome": if r.error.is_some() { "failed" } else { "ok" },
            "error": r.error,
            "group": r.group,
            "steps": r.step_names,
            "period_s": r.table.period_us as f64 / 1e6,
            "model": r.work_report.model,
            "params": params,
            "loglik": r.work_report.loglik.map(num),
            "rows": rows,
            "faults": faults,
            "read": {
                "rows": r.counts.rows,
                "out_of_order": r.counts.out_of_order,
                "duplicates_dropped": r.counts.duplicates,
                "non_finite": r.counts.non_finite,
            },
        });
        if let Some(obj) = rec.as_object_mut() {
            if !r.work_report.extra.is_empty() {
                obj.insert("extra".into(), json!(r.work_report.extra));
            }
            if !r.work_report.notes.is_empty() {
                obj.insert("notes".into(), json!(r.work_report.notes));
            }
        }
        self.push(&rec);
    }

    pub(super) fn event(&mut self, e: &Event) {
        self.push(&json!({
            "record": "event",
            "tag": e.tag,
            "from": time_text(e.from_us),
            "to": time_text(e.to_us),
            "action": e.action,
            "fault": e.fault,
            "step": e.step,
            "statistic": e.statistic.map(num),
            "threshold": e.threshold.map(num),
            "rows": e.rows,
        }));
    }

    /// Writes the run record and then the spilled lines to `path`, and
    /// removes the spill file.
    pub(super) fn write(self, path: &Path, run: &Value) -> Result<(), IoError> {
        let Body { spill, out, error } = self;
        let spill_err = |e: std::io::Error| IoError::Write { path: spill.clone(), source: e.into() };
        if let Some(e) = error {
            return Err(spill_err(e));
        }
        let mut body = out.into_inner().map_err(|e| spill_err(e.into_error()))?;
        body.seek(std::io::SeekFrom::Start(0)).map_err(spill_err)?;
        let io_err = |e: std::io::Error| IoError::Write { path: path.to_path_buf(), source: e.into() };
        let mut f = std::io::BufWriter::new(std::fs::File::create(path).map_err(io_err)?);
        let head = serde_json::to_string(run).unwrap_or_default();
        f.write_all(head.as_bytes()).map_err(io_err)?;
        f.write_all(b"\n").map_err(io_err)?;
        std::io::copy(&mut body, &mut f).map_err(io_err)?;
        f.flush().map_err(io_err)?;
        drop(body);
        std::fs::remove_file(&spill).map_err(spill_err)?;
        Ok(())
    }
}

/// The `run` record.
pub(super) struct RunRecord;

impl RunRecord {
    #[allow(clippy::new_ret_no_self)]
    pub(super) fn new(
        spec: &PipelineSpec,
        input: &InputSet,
        opts: &RunOptions,
        run_id: &str,
        started: DateTime<Utc>,
        finished: DateTime<Utc>,
        outcome: &RunOutcome,
    ) -> Value {
        let inputs: Vec<Value> = input
            .files()
            .iter()
            .map(|f| json!({"path": f.path.display().to_string(), "sha256": f.sha256, "rows": f.rows}))
            .collect();
        json!({
            "record": "run",
            "run_id": run_id,
            "tool": "tagwright",
            "version": env!("CARGO_PKG_VERSION"),
            "command_line": opts.command_line,
            "pipeline": {"path": spec.path.display().to_string(), "sha256": spec.sha256},
            "inputs": inputs,
            "plugins": spec.plugins,
            "window": {
                "from": opts.window.map(|w| time_text(w.0)),
                "to": opts.window.map(|w| time_text(w.1)),
                "label": opts.window_label,
            },
            "started": started.to_rfc3339_opts(SecondsFormat::Millis, true),
            "finished": finished.to_rfc3339_opts(SecondsFormat::Millis, true),
            "tags_processed": outcome.tags_processed,
            "tags_failed": outcome.tags_failed.iter().map(|(t, e)| json!({"tag": t, "error": e})).collect::<Vec<_>>(),
            "tags_not_selected": outcome.tags_not_selected,
            "caution": CAUTION,
        })
    }
}
