//! The scorer: one output (pipeline or baseline) against the demo's truth,
//! every figure computed from output rows (and, for drift, the provenance tag
//! record). The metrics (letters as in `docs/quality.md`):
//!
//! a. event recall by fault kind with the correct label;
//! b. precision of flagged rows;
//! c. false alarms per 10,000 rows on fault-free tags;
//! d. share of legitimate process changes wrongly flagged;
//! e. fill RMSE against truth by gap length, and RMSE of replaced rows;
//! f. 95 % interval coverage (in gaps, on replaced rows, pooled);
//! g. drift error at the end of each attributable drift event.
//!
//! [`Scores`] holds counts, not shares, so that cases pool by adding them
//! ([`Scores::merge`]).

use std::collections::{BTreeMap, BTreeSet};

use serde::Serialize;
use tagwright::demo::{DemoData, DemoOptions, FaultEvent};
use tagwright::series::Fault;

use super::{Row, RunOutput, Status};

/// Half-width of a two-sided 95 % normal interval in standard deviations
/// (1.959964, the standard normal quantile of 0.975; from memory, any normal table).
pub const Z95: f64 = 1.96;

/// A count of successes out of a count of trials (JSON: `{hit, of, share}`).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Ratio {
    pub hit: u64,
    pub of: u64,
}

impl Ratio {
    pub fn new(hit: u64, of: u64) -> Ratio {
        Ratio { hit, of }
    }

    /// Counts one trial.
    pub fn add(&mut self, hit: bool) {
        self.of += 1;
        self.hit += u64::from(hit);
    }

    /// hit / of, None when there were no trials.
    pub fn share(&self) -> Option<f64> {
        (self.of > 0).then(|| self.hit as f64 / self.of as f64)
    }

    fn merge(&mut self, o: &Ratio) {
        self.hit += o.hit;
        self.of += o.of;
    }
}

/// Root mean square error, kept as its sum of squares and count (JSON:
/// `{sum_sq, n, rmse}`).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Rmse {
    pub sum_sq: f64,
    pub n: u64,
}

impl Rmse {
    pub fn add(&mut self, err: f64) {
        self.sum_sq += err * err;
        self.n += 1;
    }

    /// sqrt(sum_sq / n), None when empty.
    pub fn value(&self) -> Option<f64> {
        (self.n > 0).then(|| (self.sum_sq / self.n as f64).sqrt())
    }

    fn merge(&mut self, o: &Rmse) {
        self.sum_sq += o.sum_sq;
        self.n += o.n;
    }
}

impl Serialize for Ratio {
    fn serialize<S: serde::Serializer>(&self, ser: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct as _;
        let mut st = ser.serialize_struct("Ratio", 3)?;
        st.serialize_field("hit", &self.hit)?;
        st.serialize_field("of", &self.of)?;
        st.serialize_field("share", &self.share())?;
        st.end()
    }
}

impl Serialize for Rmse {
    fn serialize<S: serde::Serializer>(&self, ser: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct as _;
        let mut st = ser.serialize_struct("Rmse", 3)?;
        st.serialize_field("sum_sq", &self.sum_sq)?;
        st.serialize_field("n", &self.n)?;
        st.serialize_field("rmse", &self.value())?;
        st.end()
    }
}

/// Length class of a truth gap.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
pub enum GapBucket {
    /// At most one minute.
    #[serde(rename = "le_1min")]
    UpTo1Min,
    /// Over one and at most ten minutes.
    #[serde(rename = "1_to_10min")]
    To10Min,
    /// Over ten minutes.
    #[serde(rename = "gt_10min")]
    Over10Min,
}

impl GapBucket {
    pub const ALL: [GapBucket; 3] = [GapBucket::UpTo1Min, GapBucket::To10Min, GapBucket::Over10Min];

    /// The bucket of a gap lasting `us` microseconds.
    pub fn of_length(us: i64) -> GapBucket {
        if us <= 60_000_000 {
            GapBucket::UpTo1Min
        } else if us <= 600_000_000 {
            GapBucket::To10Min
        } else {
            GapBucket::Over10Min
        }
    }

    pub fn label(self) -> &'static str {
        match self {
            GapBucket::UpTo1Min => "<= 1 min",
            GapBucket::To10Min => "1-10 min",
            GapBucket::Over10Min => "> 10 min",
        }
    }
}

/// Gap filling in one length class.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct FillBucket {
    /// Truth scans inside gaps of this class (the rows an output could fill).
    pub scans: u64,
    /// Filled rows with a value, against the truth at their time (tag units, all tags pooled).
    pub rmse: Rmse,
    /// The same in percent of each tag's instrument span, so that tags of
    /// different units pool fairly.
    pub rmse_pct_span: Rmse,
    /// Filled rows inside a gap with a null value ("not filled").
    pub not_filled: u64,
    /// Truth scans inside a gap with no output row at their time.
    pub no_row: u64,
    /// Filled rows inside a gap whose time is not a scan of the truth grid.
    pub off_grid: u64,
}

impl FillBucket {
    fn merge(&mut self, o: &FillBucket) {
        self.scans += o.scans;
        self.rmse.merge(&o.rmse);
        self.rmse_pct_span.merge(&o.rmse_pct_span);
        self.not_filled += o.not_filled;
        self.no_row += o.no_row;
        self.off_grid += o.off_grid;
    }
}

/// The error of one filled value, for comparing two outputs row by row.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FillError {
    pub case: String,
    pub tag: String,
    pub ts_us: i64,
    pub bucket: GapBucket,
    /// value - truth.
    pub err: f64,
    /// The same in percent of the tag's instrument span.
    pub err_pct_span: f64,
}

/// How one truth fault event was scored (a).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EventScore {
    pub case: String,
    pub tag: String,
    pub kind: Fault,
    pub from: String,
    pub to: String,
    /// Export rows the fault affects.
    pub rows: usize,
    /// Whether it counts in recall (visible in the export; for drift, attributable).
    pub counted: bool,
    /// Why not counted, if so.
    pub note: Option<String>,
    /// A row of the tag within [from - 1 period, to + 1 period] carries this kind.
    pub found: bool,
    /// The fault labels the output put in that window (to see mislabels).
    pub labels_seen: Vec<Fault>,
}

/// One drift event (a, g and the non-attributable checks).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DriftScore {
    pub case: String,
    pub tag: String,
    /// A group of >= 3, or a pair whose trusted member (not this tag) is healthy.
    pub attributable: bool,
    pub why: &'static str,
    /// Rows of the tag in the event window carry `drift`.
    pub labelled: bool,
    /// The injected bias at the last sample (sensor minus process).
    pub bias_true: Option<f64>,
    /// Provenance `extra.drift.bias_end`.
    pub bias_est: Option<f64>,
    /// |est - true| / |true|; None when the estimate is missing (a failure).
    pub rel_error: Option<f64>,
    /// A row of the tag inside the event is `replaced` with fault `drift`.
    pub wrongly_corrected: bool,
    /// `extra.drift.attributed == false` with a verdict that says it cannot
    /// attribute, or a kept row inside the event has a fault set.
    pub reported: bool,
    /// A lone transmitter's `extra.drift.moved` is beyond its tolerance (the
    /// movement was seen, not only the inability to attribute it).
    pub moved_beyond: bool,
}

/// False alarms on fault-free tags (c).
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct FalseAlarms {
    /// Contiguous runs of rows with a fault set (split when the label changes
    /// or a row without fault intervenes).
    pub runs: u64,
    /// Output rows of those tags, not counting `filled` rows.
    pub rows: u64,
    /// Fault-free tags.
    pub tags: u64,
    /// Runs by fault label.
    pub by_label: BTreeMap<Fault, u64>,
    /// Runs by tag.
    pub by_tag: BTreeMap<String, u64>,
}

impl FalseAlarms {
    /// Runs per 10,000 rows; None without rows.
    pub fn per_10k(&self) -> Option<f64> {
        (self.rows > 0).then(|| self.runs as f64 * 10_000.0 / self.rows as f64)
    }
}

/// A legitimate process change wrongly flagged on a tag (d).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ProcessFlag {
    pub case: String,
    pub event: String,
    pub tag: String,
    pub labels: Vec<Fault>,
}

/// The scores of one output, or of several cases pooled.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Scores {
    /// What was scored (`pipeline`, `baseline`).
    pub label: String,
    /// The demo cases pooled here (`seed 1, fault scale 1, 8 h`).
    pub cases: Vec<String>,
    /// (a) counted events found with the correct label, by kind.
    pub recall_by_kind: BTreeMap<Fault, Ratio>,
    /// (a) all kinds together.
    pub recall: Ratio,
    pub events: Vec<EventScore>,
    /// (b) flagged rows inside a truth fault event of the same tag (±1 period).
    pub precision: Ratio,
    /// (b) by the label the output gave.
    pub precision_by_label: BTreeMap<Fault, Ratio>,
    /// (c)
    pub false_alarms: FalseAlarms,
    /// (d) flagged (process event, responding tag) pairs out of all such pairs.
    pub process: Ratio,
    pub process_flags: Vec<ProcessFlag>,
    /// (e) gap filling by length class.
    pub fill: BTreeMap<GapBucket, FillBucket>,
    /// Filled rows outside every truth gap (e.g. between an exception-reported tag's stored readings).
    pub filled_outside_gaps: u64,
    /// (e) replaced rows with a value, against the truth (tag units, all tags pooled).
    pub replaced: Rmse,
    /// The same in percent of each tag's instrument span.
    pub replaced_pct_span: Rmse,
    /// (f)(i) filled rows inside truth gaps with value and std: truth within value ± 1.96 std.
    pub coverage_gaps: Ratio,
    /// (f)(ii) replaced rows with value and std.
    pub coverage_replaced: Ratio,
    /// (f)(iii) every row with value and std.
    pub coverage_all: Ratio,
    /// `ok` rows with value and std (part of (iii); the value there is the raw reading).
    pub coverage_ok: Ratio,
    /// (a, g) every drift event.
    pub drift: Vec<DriftScore>,
    /// Per-row fill errors (not in the JSON dump).
    #[serde(skip)]
    pub fill_errors: Vec<FillError>,
}

impl Scores {
    /// Adds another case's counts (the label stays).
    pub fn merge(&mut self, o: &Scores) {
        self.cases.extend(o.cases.iter().cloned());
        for (k, r) in &o.recall_by_kind {
            self.recall_by_kind.entry(*k).or_default().merge(r);
        }
        self.recall.merge(&o.recall);
        self.events.extend(o.events.iter().cloned());
        self.precision.merge(&o.precision);
        for (k, r) in &o.precision_by_label {
            self.precision_by_label.entry(*k).or_default().merge(r);
        }
        let (fa, ofa) = (&mut self.false_alarms, &o.false_alarms);
        fa.runs += ofa.runs;
        fa.rows += ofa.rows;
        fa.tags += ofa.tags;
        for (k, n) in &ofa.by_label {
            *fa.by_label.entry(*k).or_default() += n;
        }
        for (k, n) in &ofa.by_tag {
            *fa.by_tag.entry(k.clone()).or_default() += n;
        }
        self.process.merge(&o.process);
        self.process_flags.extend(o.process_flags.iter().cloned());
        for (k, b) in &o.fill {
            self.fill.entry(*k).or_default().merge(b);
        }
        self.filled_outside_gaps += o.filled_outside_gaps;
        self.replaced.merge(&o.replaced);
        self.replaced_pct_span.merge(&o.replaced_pct_span);
        self.coverage_gaps.merge(&o.coverage_gaps);
        self.coverage_replaced.merge(&o.coverage_replaced);
        self.coverage_all.merge(&o.coverage_all);
        self.coverage_ok.merge(&o.coverage_ok);
        self.drift.extend(o.drift.iter().cloned());
        self.fill_errors.extend(o.fill_errors.iter().cloned());
    }

    /// The attributable drift events.
    pub fn attributable_drifts(&self) -> impl Iterator<Item = &DriftScore> {
        self.drift.iter().filter(|d| d.attributable)
    }

    /// The non-attributable drift events.
    pub fn unattributable_drifts(&self) -> impl Iterator<Item = &DriftScore> {
        self.drift.iter().filter(|d| !d.attributable)
    }

    /// Largest end error over the attributable drifts; infinite if an estimate
    /// is missing; None if there are none.
    pub fn worst_drift_error(&self) -> Option<f64> {
        self.attributable_drifts().map(|d| d.rel_error.unwrap_or(f64::INFINITY)).reduce(f64::max)
    }

    /// Pooled JSON of the scores (without per-row fill errors).
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::to_value(self).unwrap_or(serde_json::Value::Null)
    }
}

/// A short name of a demo case.
pub fn case_name(o: &DemoOptions) -> String {
    format!("seed {}, fault scale {}, {} h", o.seed, o.fault_scale, o.hours)
}

/// The rows of `rows` (sorted by time) with from <= ts <= to.
fn rows_in(rows: &[Row], from: i64, to: i64) -> &[Row] {
    let a = rows.partition_point(|r| r.ts_us < from);
    let b = rows.partition_point(|r| r.ts_us <= to);
    &rows[a..b.max(a)]
}

/// Scores `out` against the truth of `data`; `label` names the output.
pub fn score(label: &str, out: &RunOutput, data: &DemoData) -> Scores {
    let case = case_name(&data.options);
    let mut s = Scores { label: label.to_string(), cases: vec![case.clone()], ..Scores::default() };
    let ctx = Ctx { out, data, case: &case };
    ctx.recall_and_drift(&mut s);
    ctx.precision(&mut s);
    ctx.false_alarms(&mut s);
    ctx.process(&mut s);
    ctx.fill_and_coverage(&mut s);
    s
}

struct Ctx<'a> {
    out: &'a RunOutput,
    data: &'a DemoData,
    case: &'a str,
}

impl Ctx<'_> {
    fn period(&self, tag: &str) -> i64 {
        self.data.tag(tag).map_or(0, |t| t.period_us)
    }

    /// Whether `tag` has a truth fault overlapping [from, to].
    fn faulty_during(&self, tag: &str, from: i64, to: i64) -> bool {
        self.data.truth.faults.iter().any(|f| f.tag == tag && f.from_us <= to && f.to_us >= from)
    }

    /// Attributability of a drift event, with the reason.
    fn attribution(&self, ev: &FaultEvent) -> (bool, &'static str) {
        let mut why = "lone transmitter (no redundant group)";
        for g in self.data.truth.groups.iter().filter(|g| g.members.contains(&ev.tag)) {
            if g.members.len() >= 3 {
                return (true, "group of three or more");
            }
            why = match g.trusted {
                Some(t) if t == ev.tag => "the trusted member of a pair",
                Some(t) if self.faulty_during(t, ev.from_us, ev.to_us) => "pair whose trusted member is faulty",
                Some(_) => return (true, "pair with a healthy trusted member"),
                None => "pair without a trusted member",
            };
        }
        (false, why)
    }

    fn recall_and_drift(&self, s: &mut Scores) {
        for ev in &self.data.truth.faults {
            let p = self.period(ev.tag);
            let rows = self.out.rows_of(ev.tag);
            let window = rows_in(rows, ev.from_us - p, ev.to_us + p);
            let labels: BTreeSet<Fault> = window.iter().filter_map(|r| r.fault).collect();
            let found = labels.contains(&ev.kind);
            let mut note = None;
            let mut counted = ev.rows > 0;
            if !counted {
                note = Some("no rows in the export (inside a gap)".to_string());
            }
            if ev.kind == Fault::Drift {
                let (attributable, why) = self.attribution(ev);
                if !attributable {
                    counted = false;
                    note = Some(format!("drift not attributable: {why}"));
                }
                s.drift.push(self.drift_score(ev, attributable, why, found));
            }
            if counted {
                s.recall_by_kind.entry(ev.kind).or_default().add(found);
                s.recall.add(found);
            }
            s.events.push(EventScore {
                case: self.case.to_string(),
                tag: ev.tag.to_string(),
                kind: ev.kind,
                from: tagwright::io::format_ts_us(ev.from_us),
                to: tagwright::io::format_ts_us(ev.to_us),
                rows: ev.rows,
                counted,
                note,
                found,
                labels_seen: labels.into_iter().collect(),
            });
        }
    }

    fn drift_score(&self, ev: &FaultEvent, attributable: bool, why: &'static str, labelled: bool) -> DriftScore {
        let record = self.out.records.get(ev.tag);
        let bias_est = record.and_then(|r| r.drift_bias_end());
        let rel_error = match (bias_est, ev.bias_end) {
            (Some(est), Some(b)) if b != 0.0 => Some((est - b).abs() / b.abs()),
            _ => None,
        };
        let inside = rows_in(self.out.rows_of(ev.tag), ev.from_us, ev.to_us);
        let wrongly_corrected = inside.iter().any(|r| r.status == Status::Replaced && r.fault == Some(Fault::Drift));
        let flagged = inside.iter().any(|r| r.status == Status::Ok && r.fault.is_some());
        // Reported as such: the drift step says it moved (or diverged) and
        // cannot attribute it, or the rows are flagged. "Not attributed" on a
        // member found within tolerance is not a report.
        let said = record.is_some_and(|r| {
            r.drift_attributed() == Some(false) && r.drift_verdict().is_some_and(|v| v.contains("cannot attribute"))
        });
        let reported = said || flagged;
        let moved_beyond = record.is_some_and(|r| {
            let d = r.extra.get("drift");
            let moved = d.and_then(|d| d.get("moved")).and_then(|m| m.as_f64());
            let tol = d.and_then(|d| d.get("tolerance")).and_then(|m| m.as_f64());
            matches!((moved, tol), (Some(m), Some(t)) if m.abs() > t)
        });
        DriftScore {
            case: self.case.to_string(),
            tag: ev.tag.to_string(),
            attributable,
            why,
            labelled,
            bias_true: ev.bias_end,
            bias_est,
            rel_error,
            wrongly_corrected,
            reported,
            moved_beyond,
        }
    }

    fn precision(&self, s: &mut Scores) {
        for (tag, rows) in &self.out.rows {
            let p = self.period(tag);
            let windows: Vec<(i64, i64)> = self
                .data
                .truth
                .faults
                .iter()
                .filter(|f| f.tag == tag.as_str())
                .map(|f| (f.from_us - p, f.to_us + p))
                .collect();
            for r in rows {
                let Some(f) = r.fault else { continue };
                let hit = windows.iter().any(|&(a, b)| a <= r.ts_us && r.ts_us <= b);
                s.precision.add(hit);
                s.precision_by_label.entry(f).or_default().add(hit);
            }
        }
    }

    fn false_alarms(&self, s: &mut Scores) {
        let faulty: BTreeSet<&str> = self.data.truth.faults.iter().map(|f| f.tag).collect();
        let fa = &mut s.false_alarms;
        for info in self.data.tags.iter().filter(|t| !faulty.contains(t.name)) {
            fa.tags += 1;
            let mut last: Option<Fault> = None;
            for r in self.out.rows_of(info.name) {
                if r.status != Status::Filled {
                    fa.rows += 1;
                }
                if let Some(f) = r.fault {
                    if last != Some(f) {
                        fa.runs += 1;
                        *fa.by_label.entry(f).or_default() += 1;
                        *fa.by_tag.entry(info.name.to_string()).or_default() += 1;
                    }
                }
                last = r.fault;
            }
        }
    }

    fn process(&self, s: &mut Scores) {
        for e in &self.data.truth.process {
            let name = format!("{:?} at {}", e.kind, tagwright::io::format_ts_us(e.from_us));
            for &tag in &e.tags {
                if self.faulty_during(tag, e.from_us, e.to_us) {
                    continue;
                }
                let labels: BTreeSet<Fault> = rows_in(self.out.rows_of(tag), e.from_us, e.to_us)
                    .iter()
                    .filter_map(|r| r.fault)
                    .filter(|f| !matches!(f, Fault::Range | Fault::BadQuality))
                    .collect();
                let flagged = !labels.is_empty();
                s.process.add(flagged);
                if flagged {
                    s.process_flags.push(ProcessFlag {
                        case: self.case.to_string(),
                        event: name.clone(),
                        tag: tag.to_string(),
                        labels: labels.into_iter().collect(),
                    });
                }
            }
        }
    }

    fn fill_and_coverage(&self, s: &mut Scores) {
        for b in GapBucket::ALL {
            s.fill.entry(b).or_default();
        }
        for info in &self.data.tags {
            let truth = self.data.truth_of(info.name);
            let rows = self.out.rows_of(info.name);
            let truth_at = |t: i64| truth.binary_search_by_key(&t, |v| v.ts_us).ok().map(|i| truth[i].value);
            let gaps: Vec<(i64, i64, GapBucket)> = self
                .data
                .truth
                .gaps
                .iter()
                .filter(|g| g.tags.contains(&info.name))
                .map(|g| (g.from_us, g.to_us, GapBucket::of_length(g.to_us - g.from_us)))
                .collect();
            let span = (info.range.1 - info.range.0).abs();
            let pct_span = |e: f64| if span > 0.0 { 100.0 * e / span } else { f64::NAN };
            let gap_of = |t: i64| gaps.iter().find(|&&(a, b, _)| a <= t && t < b).map(|&(_, _, k)| k);

            // Truth scans in gaps, and those the output has no row for.
            for tv in truth {
                if let Some(k) = gap_of(tv.ts_us) {
                    let fb = s.fill.entry(k).or_default();
                    fb.scans += 1;
                    if rows.binary_search_by_key(&tv.ts_us, |r| r.ts_us).is_err() {
                        fb.no_row += 1;
                    }
                }
            }

            for r in rows {
                let t = truth_at(r.ts_us);
                let covered = |v: f64, sd: f64, tr: f64| (v - tr).abs() <= Z95 * sd;
                if r.status == Status::Filled {
                    match gap_of(r.ts_us) {
                        None => s.filled_outside_gaps += 1,
                        Some(k) => {
                            let fb = s.fill.entry(k).or_default();
                            match (r.value, t) {
                                (None, _) => fb.not_filled += 1,
                                (Some(_), None) => fb.off_grid += 1,
                                (Some(v), Some(tr)) => {
                                    fb.rmse.add(v - tr);
                                    fb.rmse_pct_span.add(pct_span(v - tr));
                                    s.fill_errors.push(FillError {
                                        case: self.case.to_string(),
                                        tag: info.name.to_string(),
                                        ts_us: r.ts_us,
                                        bucket: k,
                                        err: v - tr,
                                        err_pct_span: pct_span(v - tr),
                                    });
                                    if let Some(sd) = r.std {
                                        s.coverage_gaps.add(covered(v, sd, tr));
                                    }
                                }
                            }
                        }
                    }
                }
                let (Some(v), Some(tr)) = (r.value, t) else { continue };
                if r.status == Status::Replaced {
                    s.replaced.add(v - tr);
                    s.replaced_pct_span.add(pct_span(v - tr));
                    if let Some(sd) = r.std {
                        s.coverage_replaced.add(covered(v, sd, tr));
                    }
                }
                if let Some(sd) = r.std {
                    s.coverage_all.add(covered(v, sd, tr));
                    if r.status == Status::Ok {
                        s.coverage_ok.add(covered(v, sd, tr));
                    }
                }
            }
        }
    }
}
