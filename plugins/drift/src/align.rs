//! The members of a group on one time axis.
//!
//! The union of the members' sample times is the axis; a member without a
//! usable reading at a time is missing there. A reading is usable when its
//! row is still `ok` with no fault (earlier steps did not judge it), its
//! quality is not bad and its value is finite. Uncertain-quality readings are
//! used with their noise variance multiplied by the tag's `uncertain_factor`.
//!
//! A reading that an earlier step flagged or replaced as `step` or `drift`
//! (a level fault: the reading is biased, not meaningless) is kept aside:
//! it becomes an observation of its member only when that member carries a
//! bias state ([`GroupData::include_level_faults`]), since it is then the
//! very evidence of the bias; for a member held unbiased it stays missing.

use tagwright::plugin::TagWork;
use tagwright::series::{Fault, Quality, Status};

/// The group's readings on the union of the members' times.
#[derive(Debug, Clone)]
pub struct GroupData {
    /// Union of the sample times, µs, strictly increasing (n).
    pub times: Vec<i64>,
    /// Number of members m.
    pub m: usize,
    /// Readings, n x m row-major; NaN = missing.
    pub y: Vec<f64>,
    /// Multiplier of each reading's noise variance (1, or the uncertain factor), n x m.
    pub w: Vec<f64>,
    /// Time to the next axis point in nominal periods (n; the last is 1).
    pub dt: Vec<f64>,
    /// Time of each axis point in nominal periods since the first (n).
    pub s: Vec<f64>,
    /// Nominal period of the group (the shortest of the members'), µs.
    pub period_us: i64,
    /// For each member, the axis index of each row of its table.
    pub rows: Vec<Vec<usize>>,
    /// Readings an earlier step judged `step` or `drift`, n x m; NaN elsewhere.
    pub level_faults: Vec<f64>,
}

impl GroupData {
    /// Aligns the members' tables.
    pub fn new(works: &[TagWork]) -> Self {
        let m = works.len();
        let mut times: Vec<i64> = works.iter().flat_map(|w| w.table.ts_us.iter().copied()).collect();
        times.sort_unstable();
        times.dedup();
        let n = times.len();
        let period_us = works.iter().map(|w| w.table.period_us).filter(|&p| p > 0).min().unwrap_or(1_000_000);
        let mut y = vec![f64::NAN; n * m];
        let mut wts = vec![1.0; n * m];
        let mut level_faults = vec![f64::NAN; n * m];
        let mut rows = Vec::with_capacity(m);
        for (j, work) in works.iter().enumerate() {
            let t = &work.table;
            let mut idx = Vec::with_capacity(t.len());
            let mut k = 0;
            for r in 0..t.len() {
                // Both time lists are sorted and every row time is in the union.
                while k < n && times[k] < t.ts_us[r] {
                    k += 1;
                }
                idx.push(k);
                let readable = t.quality[r] != Quality::Bad && t.raw[r].is_finite() && k < n;
                let level_fault = matches!(t.fault[r], Some(Fault::Step | Fault::Drift))
                    && matches!(t.status[r], Status::Ok | Status::Replaced);
                if readable && t.status[r] == Status::Ok && t.fault[r].is_none() {
                    y[k * m + j] = t.raw[r];
                } else if readable && level_fault {
                    level_faults[k * m + j] = t.raw[r];
                }
                if readable && t.quality[r] == Quality::Uncertain {
                    wts[k * m + j] = work.settings.uncertain_factor;
                }
            }
            rows.push(idx);
        }
        let p = period_us as f64;
        let mut dt = vec![1.0; n];
        let mut s = vec![0.0; n];
        for k in 0..n.saturating_sub(1) {
            dt[k] = ((times[k + 1] - times[k]) as f64 / p).max(1e-6);
        }
        for k in 1..n {
            s[k] = (times[k] - times[0]) as f64 / p;
        }
        GroupData { times, m, y, w: wts, dt, s, period_us, rows, level_faults }
    }

    /// Number of axis points n.
    pub fn len(&self) -> usize {
        self.times.len()
    }

    /// True when there is no axis point.
    pub fn is_empty(&self) -> bool {
        self.times.is_empty()
    }

    /// Reading of member `j` at axis point `t` (NaN if missing).
    #[inline]
    pub fn at(&self, t: usize, j: usize) -> f64 {
        self.y[t * self.m + j]
    }

    /// Makes member `j`'s readings judged `step` or `drift` by an earlier
    /// step observations; returns how many there were.
    pub fn include_level_faults(&mut self, j: usize) -> usize {
        let m = self.m;
        let mut count = 0;
        for t in 0..self.len() {
            let v = self.level_faults[t * m + j];
            if v.is_finite() && self.y[t * m + j].is_nan() {
                self.y[t * m + j] = v;
                count += 1;
            }
        }
        count
    }

    /// Number of usable readings of member `j`.
    pub fn count(&self, j: usize) -> usize {
        (0..self.len()).filter(|&t| self.at(t, j).is_finite()).count()
    }
}
