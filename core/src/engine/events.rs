//! Provenance events: one per contiguous run of changed or flagged rows.
//!
//! A row belongs to an event when its status is not `ok` or its fault is
//! set. Consecutive such rows with the same status, fault and deciding step
//! form one event, so every such row belongs to exactly one event by
//! construction (and a test checks it on the written files).

use serde::Serialize;

use crate::series::{Fault, Status, TagTable, SCAN_BLOCK};

/// One contiguous change.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Event {
    pub tag: String,
    /// First row's time, µs UTC.
    #[serde(skip)]
    pub from_us: i64,
    /// Last row's time, µs UTC (inclusive).
    #[serde(skip)]
    pub to_us: i64,
    /// `filled`, `replaced`, `rejected`, or `flagged` (a fault on a kept reading).
    pub action: &'static str,
    pub fault: Option<&'static str>,
    /// Name of the step that decided.
    pub step: String,
    /// Largest |statistic| over the rows (None if the step gives none).
    pub statistic: Option<f64>,
    /// Threshold it was compared with.
    pub threshold: Option<f64>,
    pub rows: usize,
}

fn key(t: &TagTable, i: usize) -> Option<(Status, Option<Fault>, u16)> {
    (t.status[i] != Status::Ok || t.fault[i].is_some()).then(|| (t.status[i], t.fault[i], t.decided_by[i]))
}

/// The events of one tag's table; `step_names[i]` names step i of its chain.
pub fn events(t: &TagTable, step_names: &[String]) -> Vec<Event> {
    let mut out = Vec::new();
    let n = t.len();
    let mut i = 0;
    while i < n {
        let Some(k) = key(t, i) else {
            // Skip a block of unchanged rows (the common case) at once; the
            // scan has no branch, so it vectorises.
            let hi = (i + SCAN_BLOCK).min(n);
            i = if t.any_changed(i..hi) { i + 1 } else { hi };
            continue;
        };
        let start = i;
        let (mut best, mut best_abs) = (None, -1.0);
        while i < n && key(t, i) == Some(k) {
            let s = t.stat[i];
            if s.is_finite() && s.abs() > best_abs {
                best_abs = s.abs();
                best = Some(i);
            }
            i += 1;
        }
        let (status, fault, step) = k;
        let threshold =
            best.map(|b| t.threshold[b]).or_else(|| (start..i).map(|r| t.threshold[r]).find(|v| v.is_finite()));
        out.push(Event {
            tag: t.tag.clone(),
            from_us: t.ts_us[start],
            to_us: t.ts_us[i - 1],
            action: if status == Status::Ok { "flagged" } else { status.as_str() },
            fault: fault.map(Fault::as_str),
            step: step_names.get(step as usize).cloned().unwrap_or_else(|| format!("step {step}")),
            statistic: best.map(|b| t.stat[b]),
            threshold: threshold.filter(|v| v.is_finite()),
            rows: i - start,
        });
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::series::{Quality, ReadCounts, Sampling, TagSeries};

    #[test]
    fn contiguous_runs_with_one_key_make_one_event() {
        let s = TagSeries {
            tag: "LT-1".into(),
            ts_us: (0..8).collect(),
            values: vec![1.0; 8],
            quality: vec![Quality::Good; 8],
            counts: ReadCounts::default(),
        };
        let mut t = TagTable::from_series(&s, 1, Sampling::Regular);
        t.decide(1, Status::Rejected, Some(Fault::Range), 1, 5.0, 4.0);
        t.decide(2, Status::Rejected, Some(Fault::Range), 1, 7.0, 4.0);
        t.decide(3, Status::Rejected, Some(Fault::BadQuality), 0, f64::NAN, f64::NAN);
        t.decide(5, Status::Ok, Some(Fault::Spike), 2, -9.0, 5.0);
        let ev = events(&t, &["quality".into(), "range".into(), "faults".into()]);
        assert_eq!(ev.len(), 3);
        assert_eq!((ev[0].from_us, ev[0].to_us, ev[0].rows), (1, 2, 2));
        assert_eq!((ev[0].statistic, ev[0].threshold, ev[0].step.as_str()), (Some(7.0), Some(4.0), "range"));
        assert_eq!((ev[1].fault, ev[1].statistic), (Some("bad_quality"), None));
        assert_eq!((ev[2].action, ev[2].statistic), ("flagged", Some(-9.0)));
        let covered: usize = ev.iter().map(|e| e.rows).sum();
        assert_eq!(covered, 4);
    }
}
