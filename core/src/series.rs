//! One tag's data as the pipeline sees it: the samples read from the
//! historian export ([`TagSeries`]) and the output table the steps work on
//! ([`TagTable`]).

use serde::{Deserialize, Serialize};

/// Quality class of a reading, mapped from the source's quality code.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[repr(u8)]
pub enum Quality {
    /// Usable as an observation.
    Good = 0,
    /// Usable with a larger observation variance.
    Uncertain = 1,
    /// Never used as an observation.
    Bad = 2,
}

/// How the source stored the tag.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Sampling {
    /// A sample is stored every nominal period; an unstored sample is a gap.
    Regular,
    /// A sample is stored only when the value moved by more than `deadband`
    /// (in the tag's units) from the last stored one; the source scanned at
    /// the nominal period, so a quiet stretch means "within the deadband",
    /// not "unknown".
    Exception { deadband: f64 },
}

/// Counts of the reading rules applied to one tag (reported in provenance).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct ReadCounts {
    /// Rows of the tag in the input window.
    pub rows: usize,
    /// Rows that were out of time order in the file (sorted).
    pub out_of_order: usize,
    /// Rows dropped as duplicates of an earlier timestamp (see the input rules).
    pub duplicates: usize,
    /// Readings that were NaN or infinite (kept, as bad quality).
    pub non_finite: usize,
}

/// The samples of one tag, sorted by time, as read.
#[derive(Debug, Clone, PartialEq)]
pub struct TagSeries {
    pub tag: String,
    /// Sample times, microseconds since the Unix epoch, UTC; strictly increasing.
    pub ts_us: Vec<i64>,
    /// Readings as read; NaN where the source had no finite value.
    pub values: Vec<f64>,
    /// Quality class per reading.
    pub quality: Vec<Quality>,
    /// Reading rules applied.
    pub counts: ReadCounts,
}

/// What happened to an output row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[repr(u8)]
pub enum Status {
    /// The reading is kept as the value.
    Ok = 0,
    /// A row inserted in a gap; the value is an estimate (or null).
    Filled = 1,
    /// The reading was judged faulty; the value is an estimate.
    Replaced = 2,
    /// The reading was judged faulty; no honest estimate, the value is null.
    Rejected = 3,
}

impl Status {
    /// The name written in `cleaned.parquet`.
    pub fn as_str(self) -> &'static str {
        match self {
            Status::Ok => "ok",
            Status::Filled => "filled",
            Status::Replaced => "replaced",
            Status::Rejected => "rejected",
        }
    }

    /// Every status, in output order.
    pub const ALL: [Status; 4] = [Status::Ok, Status::Filled, Status::Replaced, Status::Rejected];
}

/// Why a reading was judged faulty (or flagged).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[repr(u8)]
pub enum Fault {
    Spike = 0,
    Stuck = 1,
    Step = 2,
    Drift = 3,
    Noise = 4,
    Range = 5,
    BadQuality = 6,
}

impl Fault {
    /// The name written in `cleaned.parquet`.
    pub fn as_str(self) -> &'static str {
        match self {
            Fault::Spike => "spike",
            Fault::Stuck => "stuck",
            Fault::Step => "step",
            Fault::Drift => "drift",
            Fault::Noise => "noise",
            Fault::Range => "range",
            Fault::BadQuality => "bad_quality",
        }
    }

    /// Every fault kind, in output order.
    pub const ALL: [Fault; 7] =
        [Fault::Spike, Fault::Stuck, Fault::Step, Fault::Drift, Fault::Noise, Fault::Range, Fault::BadQuality];
}

/// No step has decided this row.
pub const NO_STEP: u16 = u16::MAX;

/// The output table of one tag: one row per output sample, in time order.
/// Steps read and change it; the writer turns it into rows of
/// `cleaned.parquet` and the provenance events.
///
/// Invariants (checked by [`TagTable::check`]): all columns have the same
/// length; times strictly increase; `status == Filled` exactly on inserted
/// rows; a row with a status other than `Ok` or with a fault has `decided_by`
/// set.
#[derive(Debug, Clone, PartialEq)]
pub struct TagTable {
    pub tag: String,
    pub ts_us: Vec<i64>,
    /// The reading as read; meaningless (written as null) on `Filled` rows.
    pub raw: Vec<f64>,
    pub quality: Vec<Quality>,
    /// Cleaned value; NaN is written as null.
    pub value: Vec<f64>,
    /// Posterior standard deviation of the true value; NaN is written as null.
    pub std: Vec<f64>,
    pub status: Vec<Status>,
    pub fault: Vec<Option<Fault>>,
    /// Index (in the tag's chain) of the step that set the row's status or fault.
    pub decided_by: Vec<u16>,
    /// The test statistic behind that decision (NaN if none).
    pub stat: Vec<f64>,
    /// The threshold it was compared with (NaN if none).
    pub threshold: Vec<f64>,
    /// Nominal sampling period in microseconds.
    pub period_us: i64,
    pub sampling: Sampling,
}

/// A table that passed [`TagTable::check`] (column lengths, times strictly
/// increasing, every changed row decided by a step). It can only be read,
/// so it stays checked; a writer need not scan its times again.
#[derive(Debug, Clone)]
pub struct CheckedTable(TagTable);

impl CheckedTable {
    /// The table itself (to change it, and check it again).
    pub fn into_table(self) -> TagTable {
        self.0
    }
}

impl std::ops::Deref for CheckedTable {
    type Target = TagTable;
    fn deref(&self) -> &TagTable {
        &self.0
    }
}

impl TagTable {
    /// The table of a freshly read tag: every reading kept as its own value.
    pub fn from_series(s: &TagSeries, period_us: i64, sampling: Sampling) -> Self {
        Self::from_owned_series(s.clone(), period_us, sampling)
    }

    /// [`TagTable::from_series`] taking the series: its times, readings and
    /// qualities move into the table (only `value` is a copy).
    pub fn from_owned_series(s: TagSeries, period_us: i64, sampling: Sampling) -> Self {
        let n = s.ts_us.len();
        TagTable {
            tag: s.tag,
            ts_us: s.ts_us,
            value: s.values.clone(),
            raw: s.values,
            quality: s.quality,
            std: vec![f64::NAN; n],
            status: vec![Status::Ok; n],
            fault: vec![None; n],
            decided_by: vec![NO_STEP; n],
            stat: vec![f64::NAN; n],
            threshold: vec![f64::NAN; n],
            period_us,
            sampling,
        }
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.ts_us.len()
    }

    /// True when the table has no row.
    pub fn is_empty(&self) -> bool {
        self.ts_us.is_empty()
    }

    /// Marks row `i` as decided by step `step`.
    pub fn decide(&mut self, i: usize, status: Status, fault: Option<Fault>, step: u16, stat: f64, threshold: f64) {
        self.status[i] = status;
        self.fault[i] = fault;
        self.decided_by[i] = step;
        self.stat[i] = stat;
        self.threshold[i] = threshold;
    }

    /// Inserts `Filled` rows at the given times (sorted, none equal to an
    /// existing time), with value and std NaN, decided by step `step`.
    pub fn insert_rows(&mut self, inserts: &[i64], step: u16) {
        if inserts.is_empty() {
            return;
        }
        let n = self.len() + inserts.len();
        let mut t = TagTable { ts_us: Vec::with_capacity(n), ..TagTable::empty_like(self) };
        let (mut i, mut j) = (0, 0);
        while i < self.len() || j < inserts.len() {
            if j < inserts.len() && (i == self.len() || inserts[j] < self.ts_us[i]) {
                t.push_filled(inserts[j], step);
                j += 1;
            } else {
                t.push_from(self, i);
                i += 1;
            }
        }
        *self = t;
    }

    fn empty_like(other: &TagTable) -> TagTable {
        TagTable {
            tag: other.tag.clone(),
            ts_us: Vec::new(),
            raw: Vec::new(),
            quality: Vec::new(),
            value: Vec::new(),
            std: Vec::new(),
            status: Vec::new(),
            fault: Vec::new(),
            decided_by: Vec::new(),
            stat: Vec::new(),
            threshold: Vec::new(),
            period_us: other.period_us,
            sampling: other.sampling,
        }
    }

    fn push_filled(&mut self, ts: i64, step: u16) {
        self.ts_us.push(ts);
        self.raw.push(f64::NAN);
        self.quality.push(Quality::Bad);
        self.value.push(f64::NAN);
        self.std.push(f64::NAN);
        self.status.push(Status::Filled);
        self.fault.push(None);
        self.decided_by.push(step);
        self.stat.push(f64::NAN);
        self.threshold.push(f64::NAN);
    }

    fn push_from(&mut self, o: &TagTable, i: usize) {
        self.ts_us.push(o.ts_us[i]);
        self.raw.push(o.raw[i]);
        self.quality.push(o.quality[i]);
        self.value.push(o.value[i]);
        self.std.push(o.std[i]);
        self.status.push(o.status[i]);
        self.fault.push(o.fault[i]);
        self.decided_by.push(o.decided_by[i]);
        self.stat.push(o.stat[i]);
        self.threshold.push(o.threshold[i]);
    }

    /// Checks the invariants; returns a description of the first broken one.
    pub fn check(&self) -> Result<(), String> {
        let n = self.len();
        let lens = [
            self.raw.len(),
            self.quality.len(),
            self.value.len(),
            self.std.len(),
            self.status.len(),
            self.fault.len(),
            self.decided_by.len(),
            self.stat.len(),
            self.threshold.len(),
        ];
        if lens.iter().any(|&l| l != n) {
            return Err(format!("tag {}: column lengths differ ({n} times, {lens:?})", self.tag));
        }
        if let Some(i) = first_not_increasing(&self.ts_us) {
            return Err(format!("tag {}: times do not increase at row {i}", self.tag));
        }
        let undecided =
            |i: usize| (self.status[i] != Status::Ok || self.fault[i].is_some()) && self.decided_by[i] == NO_STEP;
        // Unchanged rows are the common case: look closer only in a block
        // that has a changed one.
        for block in blocks(n).filter(|b| self.any_changed(b.clone())) {
            if let Some(i) = block.into_iter().find(|&i| undecided(i)) {
                return Err(format!("tag {}: row {i} changed without a deciding step", self.tag));
            }
        }
        Ok(())
    }

    /// [`TagTable::check`], keeping the proof: the table as a
    /// [`CheckedTable`], or the table back with the reason.
    pub fn checked(self) -> Result<CheckedTable, Box<(TagTable, String)>> {
        match self.check() {
            Ok(()) => Ok(CheckedTable(self)),
            Err(e) => Err(Box::new((self, e))),
        }
    }

    /// True when a row of `rows` has a status other than `ok` or a fault;
    /// scanned without early exit, so it vectorises.
    pub fn any_changed(&self, rows: std::ops::Range<usize>) -> bool {
        let st = self.status[rows.clone()].iter().fold(false, |any, &s| any | (s != Status::Ok));
        st | self.fault[rows].iter().fold(false, |any, f| any | f.is_some())
    }
}

/// Rows per block of the scans over a table that skip unchanged blocks (a
/// block is scanned without early exit, which the compiler vectorises; the
/// exact row is then looked up).
pub const SCAN_BLOCK: usize = 256;

/// Rows 0..n in blocks of [`SCAN_BLOCK`] (the last one shorter).
pub fn blocks(n: usize) -> impl Iterator<Item = std::ops::Range<usize>> {
    (0..n).step_by(SCAN_BLOCK).map(move |lo| lo..(lo + SCAN_BLOCK).min(n))
}

/// The first row whose time is not greater than the one before, if any.
pub fn first_not_increasing(ts: &[i64]) -> Option<usize> {
    let mut lo = 0;
    while lo + 1 < ts.len() {
        let hi = (lo + SCAN_BLOCK + 1).min(ts.len());
        let block = &ts[lo..hi];
        if block.windows(2).fold(false, |bad, w| bad | (w[1] <= w[0])) {
            return (lo + 1..hi).find(|&i| ts[i] <= ts[i - 1]);
        }
        lo = hi - 1;
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn insert_rows_keeps_order_and_marks_filled() {
        let s = TagSeries {
            tag: "FT-1".into(),
            ts_us: vec![0, 10, 40],
            values: vec![1.0, 2.0, 3.0],
            quality: vec![Quality::Good; 3],
            counts: ReadCounts::default(),
        };
        let mut t = TagTable::from_series(&s, 10, Sampling::Regular);
        t.insert_rows(&[20, 30], 0);
        assert_eq!(t.ts_us, [0, 10, 20, 30, 40]);
        assert_eq!(t.status, [Status::Ok, Status::Ok, Status::Filled, Status::Filled, Status::Ok]);
        assert!(t.raw[2].is_nan() && t.raw[4] == 3.0);
        t.check().unwrap();
    }

    /// The block-wise checks find the exact row, at every position around
    /// the block boundaries.
    #[test]
    fn checks_name_the_exact_row() {
        let n = 3 * SCAN_BLOCK + 7;
        let s = TagSeries {
            tag: "FT-1".into(),
            ts_us: (0..n as i64).collect(),
            values: vec![1.0; n],
            quality: vec![Quality::Good; n],
            counts: ReadCounts::default(),
        };
        let clean = TagTable::from_series(&s, 1, Sampling::Regular);
        assert_eq!(first_not_increasing(&clean.ts_us), None);
        clean.check().unwrap();
        for bad in [1, SCAN_BLOCK - 1, SCAN_BLOCK, SCAN_BLOCK + 1, 2 * SCAN_BLOCK, n - 1] {
            let mut t = clean.clone();
            t.ts_us[bad] = t.ts_us[bad - 1];
            assert_eq!(first_not_increasing(&t.ts_us), Some(bad));
            assert!(t.check().unwrap_err().contains(&format!("do not increase at row {bad}")));
            let mut t = clean.clone();
            t.status[bad] = Status::Rejected;
            assert!(t.check().unwrap_err().contains(&format!("row {bad} changed without a deciding step")));
            t.decided_by[bad] = 0;
            t.check().unwrap();
            t.fault[bad - 1] = Some(Fault::Spike);
            assert!(t.check().unwrap_err().contains(&format!("row {} changed", bad - 1)));
        }
    }
}
