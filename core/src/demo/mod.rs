//! The built-in demo scenario: one shift of historian data from "Demo Dairy
//! Unit 3", a fictional milk-powder plant (evaporator, spray dryer, boiler
//! house), with the truth behind it.
//!
//! [`generate`] simulates 61 tags in ISA-5.1 style for one 8-hour shift
//! (5-second samples; a few analysers at 30 or 60 seconds) from a seed, and
//! returns [`DemoData`]: the rows of a historian export (tag, time, value,
//! OPC quality byte; sorted by tag then time), the tag catalogue
//! ([`TagInfo`]), and the [`Truth`]: the true process value of every tag at
//! every scan, the sensor faults injected (every [`Fault`] kind), the process
//! events that move several tags at once (two feed setpoint changes, a dryer
//! trip), the gaps, and the uncertain-quality stretches.
//! [`write_export`] and [`write_truth`] write them as Parquet and JSON.
//! The scenario is described for a reader in `docs/demo.md`; its pipeline is
//! `pipelines/demo.yaml`.
//!
//! Everything random comes from [`crate::rng::Rng`] streams derived from
//! [`DemoOptions::seed`] and the tag name, so a seed gives byte-identical
//! files, and a tag's data do not depend on which other tags exist.
//!
//! ```
//! use tagwright::demo::{generate, DemoOptions};
//! use tagwright::series::Fault;
//!
//! let data = generate(&DemoOptions { hours: 2.0, ..DemoOptions::default() });
//! assert_eq!(data.tags.len(), 61);
//! assert!(data.truth.faults.iter().any(|f| f.kind == Fault::Stuck));
//! let tt = data.rows_of("TT-3105A.PV");
//! assert_eq!(tt[1].ts_us - tt[0].ts_us, 5_000_000);
//! ```

mod catalogue;
mod faults;
mod process;
mod write;

#[cfg(test)]
mod tests;

use std::collections::BTreeMap;

use chrono::{NaiveDate, NaiveDateTime, TimeZone as _};
use serde::Serialize;

use crate::rng::Rng;
use crate::series::{Fault, Sampling};

use catalogue::{process_def, TagDef, FEED_BASE, GROUPS};
use faults::{PlacedFault, PlanSize, FAULT_PLAN, GAP_PLAN, UNCERTAIN_PLAN};
use process::{Driver, Timeline};

pub use write::{write_export, write_truth, DemoError};

/// Name of the scenario.
pub const SCENARIO: &str = "Demo Dairy Unit 3";
/// The plant's time zone: shift times and the export's wall-clock times are local to it.
pub const SITE_TIMEZONE: chrono_tz::Tz = chrono_tz::Europe::Berlin;
/// File name [`write_truth`] gives the true values.
pub const TRUTH_VALUES_FILE: &str = "truth_values.parquet";
/// File name [`write_truth`] gives the events.
pub const TRUTH_EVENTS_FILE: &str = "truth_events.json";

/// Classic OPC quality byte: good (non-specific).
pub const QUALITY_GOOD: u8 = 192;
/// Classic OPC quality byte: uncertain (non-specific).
pub const QUALITY_UNCERTAIN: u8 = 64;
/// Classic OPC quality byte: uncertain, engineering units exceeded.
pub const QUALITY_EGU_EXCEEDED: u8 = 84;
/// Classic OPC quality byte: bad (non-specific).
pub const QUALITY_BAD: u8 = 0;

const US_PER_S: i64 = 1_000_000;
const US_PER_MIN: i64 = 60 * US_PER_S;
/// Length of the reference shift the plans are written for, minutes.
const REFERENCE_MIN: f64 = 480.0;

/// What to generate.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoOptions {
    /// Seed of every random draw (process, noise, fault timing jitter).
    pub seed: u64,
    /// Multiplies the size of spike, step, drift and noise faults (noise:
    /// the variance factor minus one). 1 is the documented scenario; 0 makes
    /// those faults invisible (the events stay listed). Clamped to [0, 100].
    pub fault_scale: f64,
    /// Length of the shift in hours, clamped to [1, 168]. Event times
    /// stretch with it (see `docs/demo.md`).
    pub hours: f64,
    /// Start of the shift, local wall-clock time in [`SITE_TIMEZONE`]. A time
    /// that the clocks skip (spring change) is taken one hour later; a time
    /// that occurs twice, at its first occurrence.
    pub start: NaiveDateTime,
}

impl Default for DemoOptions {
    /// Seed 1, fault scale 1, 8 hours from 2026-03-02 06:00 (early shift).
    fn default() -> Self {
        DemoOptions { seed: 1, fault_scale: 1.0, hours: 8.0, start: default_start() }
    }
}

fn default_start() -> NaiveDateTime {
    NaiveDate::from_ymd_opt(2026, 3, 2).and_then(|d| d.and_hms_opt(6, 0, 0)).unwrap_or_default()
}

impl DemoOptions {
    /// The options as used: out-of-range and non-finite values replaced.
    fn resolved(&self) -> DemoOptions {
        let fault_scale = if self.fault_scale.is_nan() { 1.0 } else { self.fault_scale.clamp(0.0, 100.0) };
        let hours = if self.hours.is_nan() { 8.0 } else { self.hours.clamp(1.0, 168.0) };
        DemoOptions { seed: self.seed, fault_scale, hours, start: self.start }
    }
}

/// Plant area.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Area {
    /// Area 31: falling-film evaporator with its feed, condenser and concentrate.
    Evaporator,
    /// Area 32: spray dryer with fluid beds, air system and powder handling.
    SprayDryer,
    /// Area 33: steam boiler, feedwater and condensate.
    BoilerHouse,
}

impl Area {
    /// Name for tables and files.
    pub fn as_str(self) -> &'static str {
        match self {
            Area::Evaporator => "evaporator",
            Area::SprayDryer => "spray_dryer",
            Area::BoilerHouse => "boiler_house",
        }
    }
}

/// One tag of the catalogue.
#[derive(Debug, Clone, PartialEq)]
pub struct TagInfo {
    pub name: &'static str,
    pub description: &'static str,
    pub area: Area,
    pub units: &'static str,
    /// Instrument range [low, high] in the tag's units.
    pub range: (f64, f64),
    /// Nominal period in microseconds (for an exception-reported tag, its scan period).
    pub period_us: i64,
    pub sampling: Sampling,
}

/// One row of the historian export.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ExportRow {
    pub tag: &'static str,
    /// Sample time, microseconds since the Unix epoch, UTC.
    pub ts_us: i64,
    pub value: f64,
    /// Classic OPC quality byte.
    pub quality: u8,
}

/// The true process value of a tag at one scan (before measurement noise and faults).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TruthValue {
    pub tag: &'static str,
    pub ts_us: i64,
    pub value: f64,
}

/// A sensor fault injected into one tag.
///
/// `size` by kind: spike, the offset added to the one reading (tag units,
/// signed); step, the bias (units); drift, the bias rate (units per hour,
/// also in `rate_per_hour`, with the bias reached at the last sample in
/// `bias_end`); noise, the factor on the noise variance; range, the
/// excursion of the pinned reading beyond the range limit (units, signed);
/// stuck and bad quality, none. `value`: the held reading (stuck), the
/// pinned reading (range), or the value stored with bad quality.
#[derive(Debug, Clone, PartialEq)]
pub struct FaultEvent {
    pub tag: &'static str,
    pub kind: Fault,
    /// First affected sample time, µs UTC.
    pub from_us: i64,
    /// Last affected sample time (inclusive), µs UTC.
    pub to_us: i64,
    pub size: Option<f64>,
    pub value: Option<f64>,
    pub rate_per_hour: Option<f64>,
    pub bias_end: Option<f64>,
    /// Rows of the export the fault affects.
    pub rows: usize,
    /// What happened, for a reader.
    pub note: &'static str,
}

/// Kind of process event.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ProcessKind {
    /// An operator changed a setpoint.
    SetpointChange,
    /// A unit tripped and was restarted.
    Trip,
}

/// A change of the process (not a sensor fault) that moves several tags at once.
#[derive(Debug, Clone, PartialEq)]
pub struct ProcessEvent {
    pub kind: ProcessKind,
    /// When it began, µs UTC.
    pub from_us: i64,
    /// Setpoint change: when the slowest response has settled; trip: the restart.
    pub to_us: i64,
    /// Tags whose true value responds, sorted.
    pub tags: Vec<&'static str>,
    /// Setpoint change: the step in the setpoint (its units).
    pub size: Option<f64>,
    pub description: String,
}

/// Missing rows: every row of `tags` with `from_us <= ts < to_us` is absent.
#[derive(Debug, Clone, PartialEq)]
pub struct Gap {
    pub tags: Vec<&'static str>,
    pub from_us: i64,
    pub to_us: i64,
    /// Rows removed, all tags together.
    pub rows: usize,
    pub cause: &'static str,
}

/// Healthy readings stored with uncertain quality (not a fault).
#[derive(Debug, Clone, PartialEq)]
pub struct UncertainStretch {
    pub tag: &'static str,
    /// First and last affected sample time (inclusive), µs UTC.
    pub from_us: i64,
    pub to_us: i64,
    pub quality: u8,
    pub rows: usize,
    pub cause: &'static str,
}

/// Transmitters measuring the same quantity.
#[derive(Debug, Clone, PartialEq)]
pub struct RedundantGroup {
    pub name: &'static str,
    pub members: Vec<&'static str>,
    /// The member to compare the others against, if one is trusted.
    pub trusted: Option<&'static str>,
}

/// What really happened in the demo shift.
#[derive(Debug, Clone, PartialEq)]
pub struct Truth {
    /// True value of every tag at every scan of its grid (including scans
    /// that are missing or not stored), sorted by tag then time.
    pub values: Vec<TruthValue>,
    /// Sensor faults, sorted by start then tag.
    pub faults: Vec<FaultEvent>,
    /// Process events, in time order.
    pub process: Vec<ProcessEvent>,
    pub gaps: Vec<Gap>,
    pub uncertain: Vec<UncertainStretch>,
    pub groups: Vec<RedundantGroup>,
}

/// The demo scenario's data.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoData {
    /// The options as used (after clamping).
    pub options: DemoOptions,
    /// Start of the shift, µs UTC.
    pub start_us: i64,
    /// End of the shift (exclusive), µs UTC.
    pub end_us: i64,
    /// The tag catalogue, sorted by name.
    pub tags: Vec<TagInfo>,
    /// The historian export, sorted by tag then time.
    pub rows: Vec<ExportRow>,
    pub truth: Truth,
}

impl DemoData {
    /// The catalogue entry of a tag.
    pub fn tag(&self, name: &str) -> Option<&TagInfo> {
        self.tags.iter().find(|t| t.name == name)
    }

    /// The export rows of a tag (empty if unknown).
    pub fn rows_of(&self, name: &str) -> &[ExportRow] {
        let a = self.rows.partition_point(|r| r.tag < name);
        let b = self.rows.partition_point(|r| r.tag <= name);
        &self.rows[a..b]
    }

    /// The true values of a tag (empty if unknown).
    pub fn truth_of(&self, name: &str) -> &[TruthValue] {
        let v = &self.truth.values;
        let a = v.partition_point(|r| r.tag < name);
        let b = v.partition_point(|r| r.tag <= name);
        &v[a..b]
    }
}

/// Random stream for one purpose of one tag.
fn stream(seed: u64, name: &str, purpose: u64) -> Rng {
    // FNV-1a of the name, mixed with the seed and the purpose (SplitMix64 seeding does the rest).
    let h = name.bytes().fold(0xcbf2_9ce4_8422_2325_u64, |h, b| (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3));
    Rng::new(seed ^ h.rotate_left(21) ^ purpose.wrapping_mul(0x9E37_79B9_7F4A_7C15))
}

const PROCESS: u64 = 1;
const MEASURE: u64 = 2;
const FAULT_TIMES: u64 = 3;

/// UTC instant of a local wall-clock time in the site's zone (see [`DemoOptions::start`]).
fn local_to_utc_us(t: NaiveDateTime) -> i64 {
    SITE_TIMEZONE
        .from_local_datetime(&t)
        .earliest()
        .or_else(|| SITE_TIMEZONE.from_local_datetime(&(t + chrono::Duration::hours(1))).earliest())
        .map_or_else(|| t.and_utc().timestamp_micros(), |d| d.timestamp_micros())
}

/// Times of the plans on this shift.
struct Clock {
    start_us: i64,
    end_us: i64,
    hours: f64,
}

impl Clock {
    /// Plan minute `m` of the 8-hour reference, on this shift, on a 5 s grid.
    fn at(&self, m: f64) -> i64 {
        let us = m / REFERENCE_MIN * self.hours * 60.0 * US_PER_MIN as f64;
        self.start_us + snap(us)
    }

    /// A plan duration of `m` minutes on this shift.
    fn dur(&self, m: f64) -> i64 {
        snap(m * (self.hours / 8.0).min(1.0) * US_PER_MIN as f64).max(5 * US_PER_S)
    }
}

fn snap(us: f64) -> i64 {
    let step = 5 * US_PER_S;
    (us / step as f64).round() as i64 * step
}

/// Sample index range [first, last] of the grid `start + k period` (k < n)
/// inside [from, to]; None if empty.
fn index_range(start_us: i64, period_us: i64, n: usize, from_us: i64, to_us: i64) -> Option<(usize, usize)> {
    let rel_to = to_us - start_us;
    if rel_to < 0 || n == 0 {
        return None;
    }
    let first = ((from_us - start_us).max(0) + period_us - 1) / period_us;
    let last = (rel_to / period_us).min(n as i64 - 1);
    (first <= last).then_some((first as usize, last as usize))
}

/// Generates the demo scenario.
pub fn generate(opts: &DemoOptions) -> DemoData {
    let o = opts.resolved();
    let start_us = local_to_utc_us(o.start);
    let end_us = start_us + (o.hours * 3600.0 * US_PER_S as f64).round() as i64;
    let clock = Clock { start_us, end_us, hours: o.hours };
    let trip = (clock.at(220.0), clock.at(220.0) + clock.dur(25.0));
    let tl = Timeline { feed: vec![(clock.at(90.0), 24.5), (clock.at(310.0), 21.0)], trip };

    let mut defs: Vec<&'static TagDef> = catalogue::all().collect();
    defs.sort_by_key(|d| d.name);

    let placed = place_faults(&o, &clock, &defs);
    let gaps = resolve_gaps(&clock, &defs);
    let mut gap_rows = vec![0usize; gaps.len()];
    let uncertain = resolve_uncertain(&clock, &tl);

    let mut truth_cache: BTreeMap<&'static str, Vec<f64>> = BTreeMap::new();
    let mut tags = Vec::with_capacity(defs.len());
    let mut rows = Vec::new();
    let mut values = Vec::new();
    let mut fault_events = Vec::new();
    let mut stretches = Vec::new();
    for def in &defs {
        let period_us = def.period_s * US_PER_S;
        let n = usize::try_from((end_us - start_us) / period_us).unwrap_or(0);
        let ts: Vec<i64> = (0..n).map(|k| start_us + k as i64 * period_us).collect();
        let owner = process_def(def);
        let truth = truth_cache
            .entry(owner.name)
            .or_insert_with(|| {
                let op = process::operating_point(owner, &tl, start_us, period_us, n);
                process::truth(owner, &op, period_us, &mut stream(o.seed, owner.name, PROCESS))
            })
            .clone();
        let mut rng = stream(o.seed, def.name, MEASURE);
        let z: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
        let my_faults: Vec<PlacedFault> = placed.iter().filter(|f| f.plan.tag == def.name).copied().collect();
        let my_uncertain: Vec<(usize, usize, &UncertainStretch)> = uncertain
            .iter()
            .filter(|u| u.tag == def.name)
            .filter_map(|u| index_range(start_us, period_us, n, u.from_us, u.to_us).map(|(a, b)| (a, b, u)))
            .collect();
        let ranges: Vec<(usize, usize)> = my_uncertain.iter().map(|&(a, b, _)| (a, b)).collect();
        let r = faults::readings(def, &ts, &truth, &z, &my_faults, &ranges);

        // Gaps, then exception thinning.
        let mut in_gap = vec![false; n];
        for (g, gap_rows) in gaps.iter().zip(gap_rows.iter_mut()) {
            if g.tags.contains(&def.name) {
                for (k, &t) in ts.iter().enumerate() {
                    if g.from_us <= t && t < g.to_us {
                        in_gap[k] = true;
                        *gap_rows += 1;
                    }
                }
            }
        }
        let keep = stored(def, &r.value, &r.quality, &in_gap);

        let count = |a: usize, b: usize| keep[a..=b].iter().filter(|&&k| k).count();
        for (mut ev, f) in r.events.into_iter().zip(&my_faults) {
            ev.rows = count(f.first, f.last);
            fault_events.push(ev);
        }
        for (a, b, u) in my_uncertain {
            stretches.push(UncertainStretch { from_us: ts[a], to_us: ts[b], rows: count(a, b), ..u.clone() });
        }
        for k in (0..n).filter(|&k| keep[k]) {
            rows.push(ExportRow { tag: def.name, ts_us: ts[k], value: r.value[k], quality: r.quality[k] });
        }
        values.extend(ts.iter().zip(&truth).map(|(&t, &v)| TruthValue { tag: def.name, ts_us: t, value: v }));
        tags.push(TagInfo {
            name: def.name,
            description: def.description,
            area: def.area,
            units: def.units,
            range: def.range,
            period_us,
            sampling: def.deadband.map_or(Sampling::Regular, |deadband| Sampling::Exception { deadband }),
        });
    }
    fault_events.sort_by(|a, b| (a.from_us, a.tag).cmp(&(b.from_us, b.tag)));
    stretches.sort_by(|a, b| (a.from_us, a.tag).cmp(&(b.from_us, b.tag)));
    let gaps = gaps.into_iter().zip(gap_rows).map(|(g, rows)| Gap { rows, ..g }).collect();
    let groups = GROUPS
        .iter()
        .map(|&(name, members, trusted)| RedundantGroup { name, members: members.to_vec(), trusted })
        .collect();
    let process = process_events(&tl, &defs, end_us);
    DemoData {
        options: o,
        start_us,
        end_us,
        tags,
        rows,
        truth: Truth { values, faults: fault_events, process, gaps, uncertain: stretches, groups },
    }
}

/// Which scans are stored: not in a gap, and for an exception-reported tag
/// only the first scan, the first after a gap, and scans whose reading moved
/// by more than the deadband (or whose quality changed) since the last stored one.
fn stored(def: &TagDef, value: &[f64], quality: &[u8], in_gap: &[bool]) -> Vec<bool> {
    let Some(deadband) = def.deadband else {
        return in_gap.iter().map(|&g| !g).collect();
    };
    let mut keep = vec![false; value.len()];
    let mut last: Option<(f64, u8)> = None;
    for k in 0..value.len() {
        if in_gap[k] {
            last = None;
            continue;
        }
        let store = match last {
            None => true,
            Some((v, q)) => (value[k] - v).abs() > deadband || quality[k] != q,
        };
        if store {
            keep[k] = true;
            last = Some((value[k], quality[k]));
        }
    }
    keep
}

/// Places the fault plan on the tags' grids, with the seeded start jitter.
fn place_faults(o: &DemoOptions, clock: &Clock, defs: &[&'static TagDef]) -> Vec<PlacedFault> {
    let mut rng = stream(o.seed, "faults", FAULT_TIMES);
    let jitter_max = 3.0 * (o.hours / 8.0).min(1.0) * US_PER_MIN as f64;
    let mut out = Vec::new();
    for plan in FAULT_PLAN {
        // Draw for every plan entry, so the jitter of one fault never depends on another's tag.
        let jitter = snap((2.0 * rng.uniform() - 1.0) * jitter_max);
        let Some(def) = defs.iter().find(|d| d.name == plan.tag) else { continue };
        let period_us = def.period_s * US_PER_S;
        let n = (clock.end_us - clock.start_us) / period_us;
        if n < 2 {
            continue;
        }
        let t0 = (clock.at(plan.at_min) + jitter).clamp(clock.start_us, clock.end_us - 1);
        // A fault starts at the first sample at or after its time; never on the very first sample.
        let first = ((t0 - clock.start_us + period_us - 1) / period_us).clamp(1, n - 1);
        let last = if plan.dur_min.is_infinite() {
            n - 1
        } else if plan.dur_min <= 0.0 {
            first
        } else {
            (first + (clock.dur(plan.dur_min) / period_us).max(1) - 1).min(n - 1)
        };
        let s = o.fault_scale;
        let size = match plan.size {
            PlanSize::Sigma(k) => k * process::one_step_sigma(def, period_us) * s,
            PlanSize::Bias(b) => b * s,
            PlanSize::Rate(r) => r * s,
            PlanSize::Variance(v) => 1.0 + (v - 1.0) * s,
            PlanSize::Freeze | PlanSize::Pin { .. } | PlanSize::Bad { .. } => f64::NAN,
        };
        out.push(PlacedFault { plan: *plan, first: first as usize, last: last as usize, size });
    }
    out
}

fn resolve_gaps(clock: &Clock, defs: &[&'static TagDef]) -> Vec<Gap> {
    GAP_PLAN
        .iter()
        .map(|g| {
            let tags = if g.area_prefix.is_empty() {
                g.tags.to_vec()
            } else {
                defs.iter().filter(|d| loop_number(d.name).starts_with(g.area_prefix)).map(|d| d.name).collect()
            };
            let from_us = clock.at(g.at_min);
            Gap { tags, from_us, to_us: from_us + clock.dur(g.dur_min), rows: 0, cause: g.cause }
        })
        .collect()
}

/// The loop number of a tag: the digits after the first `-` (`FT-3101A.PV` -> `3101A.PV`).
fn loop_number(name: &str) -> &str {
    name.split_once('-').map_or(name, |(_, rest)| rest)
}

fn resolve_uncertain(clock: &Clock, tl: &Timeline) -> Vec<UncertainStretch> {
    UNCERTAIN_PLAN
        .iter()
        .map(|u| {
            let (from_us, to_us) = if u.during_trip {
                (tl.trip.0, tl.trip.1 + clock.dur(10.0))
            } else {
                let from = clock.at(u.at_min);
                (from, from + clock.dur(u.dur_min) - 1)
            };
            UncertainStretch { tag: u.tag, from_us, to_us, quality: QUALITY_UNCERTAIN, rows: 0, cause: u.cause }
        })
        .collect()
}

fn process_events(tl: &Timeline, defs: &[&'static TagDef], end_us: i64) -> Vec<ProcessEvent> {
    let responders = |d: Driver| -> (Vec<&'static str>, f64) {
        let mut settle: f64 = 0.0;
        let mut tags = Vec::new();
        for def in defs {
            let rs: Vec<_> = process_def(def).responses.iter().filter(|r| r.driver == d).collect();
            if !rs.is_empty() {
                tags.push(def.name);
                settle = rs.iter().map(|r| r.settle_s()).fold(settle, f64::max);
            }
        }
        (tags, settle)
    };
    let mut out = Vec::new();
    let (feed_tags, settle_s) = responders(Driver::Feed);
    let mut sp = FEED_BASE;
    for &(t, new) in &tl.feed {
        out.push(ProcessEvent {
            kind: ProcessKind::SetpointChange,
            from_us: t,
            to_us: (t + (settle_s * US_PER_S as f64) as i64).min(end_us - 5 * US_PER_S),
            tags: feed_tags.clone(),
            size: Some(new - sp),
            description: format!(
                "milk feed flow setpoint FIC-3101 changed from {sp:.1} to {new:.1} m3/h; \
                 the evaporator, the dryer feed and the boiler follow with their lags"
            ),
        });
        sp = new;
    }
    let (trip_tags, _) = responders(Driver::Trip);
    out.push(ProcessEvent {
        kind: ProcessKind::Trip,
        from_us: tl.trip.0,
        to_us: tl.trip.1,
        tags: trip_tags,
        size: None,
        description: "spray dryer tripped (air heater interlock): feed pump and atomiser stopped, \
                      air flow to minimum, concentrate held in the feed tank, boiler load dropped; \
                      restarted at the end of the event"
            .to_string(),
    });
    out.sort_by_key(|e| e.from_us);
    out
}
