//! The rule-of-thumb baseline: what a careful engineer does to historian data
//! without a model, working on the export rows and the tag catalogue alone
//! (range, nominal period, sampling kind). It gives the same per-row output
//! shape as a pipeline run so that one scorer reads both.
//!
//! Per tag, in this order (a reading takes the first rule that judges it):
//!
//! 1. **Bad quality**: a reading whose classic OPC quality byte is bad
//!    (bits 7-6 = 00, i.e. byte < 64) is judged faulty, fault `bad_quality`;
//!    a non-finite reading likewise.
//! 2. **Range limits**: a reading outside the catalogue's instrument range
//!    [low, high] is judged faulty, fault `range`.
//! 3. **Flatline (N-repeat) rule**: N or more consecutive identical readings
//!    (among those left) are all judged `stuck` (common practice, no source).
//! 4. **Hampel filter** on the readings left: reading i is an outlier
//!    (`spike`) when |x_i - m_i| > t * S_i, with m_i the median of the
//!    readings i-k..=i+k (the window is cut at the ends) and
//!    S_i = 1.4826 * MAD_i the scaled median absolute deviation from m_i.
//!    The moving-window filter is as described by Pearson (2002), "Outliers
//!    in process modeling and identification", IEEE Transactions on Control
//!    Systems Technology 10(1), 55-63 (from memory), after the median/MAD
//!    outlier identifier of Hampel (1974), "The influence curve and its role
//!    in robust estimation", JASA 69, 383-393 (from memory); 1.4826 makes the
//!    MAD a consistent estimate of a normal standard deviation (1/Phi^-1(3/4),
//!    from memory). One addition of ours: S_i is floored at the tag's
//!    quantisation step (the smallest non-zero change between consecutive
//!    readings), so a window of identical readings does not flag every
//!    reading that differs by one count.
//!
//! Rules 3 and 4 need regular samples; they are not applied to
//! exception-reported tags (whose stored readings always differ).
//!
//! A reading judged faulty is `replaced` by linear interpolation in time
//! between the nearest kept readings before and after it, or `rejected`
//! (null value) when there is none on one side. Where two consecutive
//! readings are more than 1.5 nominal periods apart, rows are inserted at the
//! nominal period counted on from the earlier one (`filled`), with values
//! interpolated the same way. The baseline has no step, drift or noise
//! detection and no standard deviations (so no interval coverage).

use std::collections::BTreeMap;

use tagwright::demo::{ExportRow, TagInfo};
use tagwright::series::{Fault, Sampling};

use super::{Row, RunOutput, Status};

/// The baseline's settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BaselineParams {
    /// Hampel half-window k: the window is readings i-k..=i+k.
    pub hampel_k: usize,
    /// Hampel threshold t in scaled MADs (3 in the issue; Pearson 2002 uses 3, from memory).
    pub hampel_t: f64,
    /// Flatline rule: this many identical consecutive readings are `stuck`.
    pub flatline_n: usize,
}

impl Default for BaselineParams {
    /// k = 10 (a 21-reading window, 105 s at 5 s; common practice, no
    /// source; `docs/quality.md` shows other k), t = 3 (the and
    /// Pearson's choice), N = 12 (one minute at 5 s; common practice, no source).
    fn default() -> Self {
        BaselineParams { hampel_k: 10, hampel_t: 3.0, flatline_n: 12 }
    }
}

/// Consistency constant of the MAD for normal data, 1 / Phi^-1(3/4) (from memory: 1.4826).
const MAD_SCALE: f64 = 1.4826;

/// Classic OPC quality: bad when the two top bits are 00.
fn is_bad_quality(q: u8) -> bool {
    q < 64
}

/// Cleans the export `rows` (any order) with the rules of thumb; `tags` is
/// the catalogue. A tag missing from the catalogue gets no range check and
/// the median spacing of its readings as period.
pub fn baseline(rows: &[ExportRow], tags: &[TagInfo], p: &BaselineParams) -> RunOutput {
    let mut by_tag: BTreeMap<&str, Vec<&ExportRow>> = BTreeMap::new();
    for r in rows {
        by_tag.entry(r.tag).or_default().push(r);
    }
    let mut out = RunOutput::default();
    for (tag, mut readings) in by_tag {
        readings.sort_by_key(|r| r.ts_us);
        readings.dedup_by_key(|r| r.ts_us);
        let info = tags.iter().find(|t| t.name == tag);
        out.rows.insert(tag.to_string(), clean_tag(&readings, info, p));
    }
    out
}

fn median_spacing(readings: &[&ExportRow]) -> i64 {
    let mut d: Vec<i64> = readings.windows(2).map(|w| w[1].ts_us - w[0].ts_us).filter(|&d| d > 0).collect();
    d.sort_unstable();
    d.get(d.len() / 2).copied().unwrap_or(1_000_000)
}

fn clean_tag(readings: &[&ExportRow], info: Option<&TagInfo>, p: &BaselineParams) -> Vec<Row> {
    let n = readings.len();
    let period = info.map_or_else(|| median_spacing(readings), |t| t.period_us).max(1);
    let regular = info.is_none_or(|t| t.sampling == Sampling::Regular);
    let mut fault: Vec<Option<Fault>> = vec![None; n];
    for (k, r) in readings.iter().enumerate() {
        if is_bad_quality(r.quality) || !r.value.is_finite() {
            fault[k] = Some(Fault::BadQuality);
        } else if let Some((lo, hi)) = info.map(|t| t.range) {
            if r.value < lo || r.value > hi {
                fault[k] = Some(Fault::Range);
            }
        }
    }
    if regular {
        flatline(readings, &mut fault, p.flatline_n);
        hampel(readings, &mut fault, p);
    }

    // Kept readings, for interpolation.
    let kept: Vec<(i64, f64)> =
        readings.iter().zip(&fault).filter(|(_, f)| f.is_none()).map(|(r, _)| (r.ts_us, r.value)).collect();
    let interp = |t: i64| -> Option<f64> { interpolate(&kept, t) };

    let mut out = Vec::with_capacity(n);
    for (k, r) in readings.iter().enumerate() {
        if k > 0 {
            let prev = readings[k - 1].ts_us;
            if (r.ts_us - prev) as f64 > 1.5 * period as f64 {
                let mut t = prev + period;
                while t < r.ts_us {
                    let v = interp(t);
                    out.push(Row { ts_us: t, raw: None, value: v, std: None, status: Status::Filled, fault: None });
                    t += period;
                }
            }
        }
        match fault[k] {
            None => out.push(Row::ok(r.ts_us, r.value)),
            Some(f) => {
                let v = interp(r.ts_us);
                let status = if v.is_some() { Status::Replaced } else { Status::Rejected };
                out.push(Row { ts_us: r.ts_us, raw: Some(r.value), value: v, std: None, status, fault: Some(f) });
            }
        }
    }
    out
}

/// Linear interpolation in time between the kept readings around `t`
/// (`kept` sorted by time); the reading itself at an exact match; None
/// when there is no kept reading on one side.
fn interpolate(kept: &[(i64, f64)], t: i64) -> Option<f64> {
    let i = kept.partition_point(|&(ts, _)| ts < t);
    let &(t1, v1) = kept.get(i)?;
    if t1 == t {
        return Some(v1);
    }
    let &(t0, v0) = kept.get(i.checked_sub(1)?)?;
    let w = (t - t0) as f64 / (t1 - t0) as f64;
    Some(v0 + w * (v1 - v0))
}

/// Marks every run of >= `n` identical consecutive readings (among those
/// not yet judged) as stuck.
fn flatline(readings: &[&ExportRow], fault: &mut [Option<Fault>], n: usize) {
    let idx: Vec<usize> = (0..readings.len()).filter(|&k| fault[k].is_none()).collect();
    let mut a = 0;
    while a < idx.len() {
        let v = readings[idx[a]].value;
        let mut b = a + 1;
        while b < idx.len() && readings[idx[b]].value == v {
            b += 1;
        }
        if b - a >= n.max(2) {
            for &k in &idx[a..b] {
                fault[k] = Some(Fault::Stuck);
            }
        }
        a = b;
    }
}

/// The Hampel filter over the readings not yet judged (see the module doc).
fn hampel(readings: &[&ExportRow], fault: &mut [Option<Fault>], p: &BaselineParams) {
    let idx: Vec<usize> = (0..readings.len()).filter(|&k| fault[k].is_none()).collect();
    let x: Vec<f64> = idx.iter().map(|&k| readings[k].value).collect();
    let quantum = x.windows(2).map(|w| (w[1] - w[0]).abs()).filter(|&d| d > 0.0).fold(f64::INFINITY, f64::min);
    let floor = if quantum.is_finite() { quantum } else { 0.0 };
    let mut window = Vec::with_capacity(2 * p.hampel_k + 1);
    let mut dev = Vec::with_capacity(2 * p.hampel_k + 1);
    let mut outlier = vec![false; x.len()];
    for i in 0..x.len() {
        let a = i.saturating_sub(p.hampel_k);
        let b = (i + p.hampel_k + 1).min(x.len());
        window.clear();
        window.extend_from_slice(&x[a..b]);
        let m = median(&mut window);
        dev.clear();
        dev.extend(x[a..b].iter().map(|v| (v - m).abs()));
        let s = (MAD_SCALE * median(&mut dev)).max(floor);
        outlier[i] = (x[i] - m).abs() > p.hampel_t * s;
    }
    for (j, &k) in idx.iter().enumerate() {
        if outlier[j] {
            fault[k] = Some(Fault::Spike);
        }
    }
}

/// Median of a non-empty slice (reorders it); NaN if empty.
fn median(v: &mut [f64]) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_unstable_by(f64::total_cmp);
    let h = v.len() / 2;
    if v.len() % 2 == 1 {
        v[h]
    } else {
        0.5 * (v[h - 1] + v[h])
    }
}
