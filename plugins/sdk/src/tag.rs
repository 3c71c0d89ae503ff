//! [`Tag`]: the safe view of one tag's columns that a plugin works on.

use crate::abi::{Slice, SliceMut, TagColumns, NO_FAULT};
use crate::codes::{fault_code, Fault, Quality, Status};
use crate::Error;

/// One tag's output table, borrowed from the host for one `process` call.
///
/// Rows cannot be inserted or removed. A plugin changes rows with
/// [`reject`](Tag::reject), [`replace`](Tag::replace), [`flag`](Tag::flag)
/// and [`set_std`](Tag::set_std), which keep the host's rules; the host
/// checks what comes back (see `docs/plugins.md`) and fails the tag when a
/// rule is broken:
///
/// - status and fault codes must be known codes;
/// - `filled` is neither set nor cleared (rows are inserted only by the host);
/// - a row left `ok` keeps its reading as its value;
/// - a `rejected` row has no value (NaN).
#[derive(Debug)]
pub struct Tag<'a> {
    name: &'a str,
    ts_us: &'a [i64],
    raw: &'a [f64],
    quality: &'a [u8],
    cols: Columns<'a>,
    period_us: i64,
    range: Option<(f64, f64)>,
}

/// The writable columns as plain slices, for plugins that need them all
/// at once. Status and fault hold codes ([`Status::code`],
/// [`crate::fault_code`]); the host validates them after the call.
#[derive(Debug)]
pub struct Columns<'a> {
    pub value: &'a mut [f64],
    pub std: &'a mut [f64],
    pub status: &'a mut [u8],
    pub fault: &'a mut [u8],
    pub stat: &'a mut [f64],
    pub threshold: &'a mut [f64],
}

/// A read-only column as a slice, after checking its length and pointer.
///
/// # Safety
/// `s.ptr` must point to `s.len` initialised elements that stay valid and
/// unchanged for `'a` (the host guarantees it for the duration of `process`).
unsafe fn column<'a, T>(what: &str, s: Slice<T>, n: usize) -> Result<&'a [T], Error> {
    if s.len != n {
        return Err(Error::new(format!("host passed column `{what}` with {} rows, expected {n}", s.len)));
    }
    if n == 0 {
        return Ok(&[]);
    }
    if s.ptr.is_null() || !s.ptr.is_aligned() {
        return Err(Error::new(format!("host passed column `{what}` with a null or misaligned pointer")));
    }
    // SAFETY: non-null, aligned, `n` elements valid for 'a (the caller's contract).
    Ok(unsafe { std::slice::from_raw_parts(s.ptr, n) })
}

/// A writable column as a slice, after checking its length and pointer.
///
/// # Safety
/// As [`column`], and no other reference to the elements may exist for `'a`.
unsafe fn column_mut<'a, T>(what: &str, s: SliceMut<T>, n: usize) -> Result<&'a mut [T], Error> {
    if s.len != n {
        return Err(Error::new(format!("host passed column `{what}` with {} rows, expected {n}", s.len)));
    }
    if n == 0 {
        return Ok(&mut []);
    }
    if s.ptr.is_null() || !s.ptr.is_aligned() {
        return Err(Error::new(format!("host passed column `{what}` with a null or misaligned pointer")));
    }
    // SAFETY: non-null, aligned, `n` elements valid and unaliased for 'a.
    Ok(unsafe { std::slice::from_raw_parts_mut(s.ptr, n) })
}

impl<'a> Tag<'a> {
    /// The view of the host's columns; checks sizes, lengths, pointers and codes.
    ///
    /// # Safety
    /// The columns must be valid for `'a` as [`TagColumns`] documents: each
    /// pointer to `len` initialised elements, the writable ones not aliased.
    pub unsafe fn from_columns(c: &'a TagColumns) -> Result<Tag<'a>, Error> {
        if c.size < std::mem::size_of::<TagColumns>() {
            return Err(Error::new(format!(
                "host passed TagColumns of {} bytes, this SDK needs at least {}",
                c.size,
                std::mem::size_of::<TagColumns>()
            )));
        }
        let n = c.ts_us.len;
        // SAFETY: the caller's contract, per column.
        let tag = unsafe {
            let name = column("tag", c.tag, c.tag.len)?;
            let name = std::str::from_utf8(name).map_err(|_| Error::new("host passed a tag name that is not UTF-8"))?;
            Tag {
                name,
                ts_us: column("ts_us", c.ts_us, n)?,
                raw: column("raw", c.raw, n)?,
                quality: column("quality", c.quality, n)?,
                cols: Columns {
                    value: column_mut("value", c.value, n)?,
                    std: column_mut("std", c.std, n)?,
                    status: column_mut("status", c.status, n)?,
                    fault: column_mut("fault", c.fault, n)?,
                    stat: column_mut("stat", c.stat, n)?,
                    threshold: column_mut("threshold", c.threshold, n)?,
                },
                period_us: c.period_us,
                range: (c.range_low.is_finite() && c.range_high.is_finite()).then_some((c.range_low, c.range_high)),
            }
        };
        // Codes are small: a maximum over the column (which vectorises) finds
        // any bad one; the row is looked up only then. Fault codes are shifted
        // by one so that NO_FAULT (255) wraps to 0.
        let max = |v: &[u8], shift: u8| v.iter().fold(0u8, |m, &x| m.max(x.wrapping_add(shift)));
        if max(tag.quality, 0) > Quality::Bad.code() {
            let i = tag.quality.iter().position(|&q| Quality::from_code(q).is_none()).unwrap_or(0);
            return Err(Error::new(format!("host passed quality code {} at row {i}", tag.quality[i])));
        }
        if max(tag.cols.status, 0) > Status::Rejected.code() {
            let i = tag.cols.status.iter().position(|&s| Status::from_code(s).is_none()).unwrap_or(0);
            return Err(Error::new(format!("host passed status code {} at row {i}", tag.cols.status[i])));
        }
        if max(tag.cols.fault, 1) > Fault::BadQuality.code() + 1 {
            let i = tag.cols.fault.iter().position(|&f| f != NO_FAULT && Fault::from_code(f).is_none()).unwrap_or(0);
            return Err(Error::new(format!("host passed fault code {} at row {i}", tag.cols.fault[i])));
        }
        Ok(tag)
    }

    /// The tag name.
    #[inline]
    pub fn name(&self) -> &str {
        self.name
    }

    /// Number of rows.
    #[inline]
    pub fn len(&self) -> usize {
        self.ts_us.len()
    }

    /// True when the tag has no row.
    #[inline]
    pub fn is_empty(&self) -> bool {
        self.ts_us.is_empty()
    }

    /// Sample times, microseconds since 1970-01-01 UTC, strictly increasing.
    #[inline]
    pub fn ts_us(&self) -> &[i64] {
        self.ts_us
    }

    /// The readings as read (NaN where none, and on filled rows).
    #[inline]
    pub fn raw(&self) -> &[f64] {
        self.raw
    }

    /// The cleaned values so far (NaN: null).
    #[inline]
    pub fn value(&self) -> &[f64] {
        self.cols.value
    }

    /// Posterior standard deviations so far (NaN: none).
    #[inline]
    pub fn std(&self) -> &[f64] {
        self.cols.std
    }

    /// Nominal sampling period, microseconds.
    #[inline]
    pub fn period_us(&self) -> i64 {
        self.period_us
    }

    /// The instrument range `[low, high]` the pipeline gives the tag, if any.
    #[inline]
    pub fn range(&self) -> Option<(f64, f64)> {
        self.range
    }

    /// Quality of row `i`'s reading.
    #[inline]
    pub fn quality(&self, i: usize) -> Quality {
        // Codes were checked in `from_columns`.
        Quality::from_code(self.quality[i]).unwrap_or(Quality::Bad)
    }

    /// Status of row `i`.
    #[inline]
    pub fn status(&self, i: usize) -> Status {
        Status::from_code(self.cols.status[i]).unwrap_or(Status::Rejected)
    }

    /// Fault of row `i`, if any.
    #[inline]
    pub fn fault(&self, i: usize) -> Option<Fault> {
        Fault::from_code(self.cols.fault[i])
    }

    /// True when row `i` is a kept reading (status `ok`) with no fault set
    /// by an earlier step: the rows a detector normally tests.
    #[inline]
    pub fn is_clean(&self, i: usize) -> bool {
        self.cols.status[i] == Status::Ok.code() && self.cols.fault[i] == NO_FAULT
    }

    /// Rejects row `i`'s reading: status `rejected`, the fault, value and std
    /// NaN, and the statistic and threshold behind the decision.
    #[inline]
    pub fn reject(&mut self, i: usize, fault: Fault, stat: f64, threshold: f64) {
        self.decide(i, Status::Rejected, Some(fault), stat, threshold);
        self.cols.value[i] = f64::NAN;
        self.cols.std[i] = f64::NAN;
    }

    /// Replaces row `i`'s reading by an estimate with its standard deviation:
    /// status `replaced`.
    #[inline]
    #[allow(clippy::too_many_arguments)]
    pub fn replace(&mut self, i: usize, value: f64, std: f64, fault: Fault, stat: f64, threshold: f64) {
        self.decide(i, Status::Replaced, Some(fault), stat, threshold);
        self.cols.value[i] = value;
        self.cols.std[i] = std;
    }

    /// Flags row `i`'s reading with a fault and keeps it (status `ok`, value
    /// = raw).
    #[inline]
    pub fn flag(&mut self, i: usize, fault: Fault, stat: f64, threshold: f64) {
        self.decide(i, Status::Ok, Some(fault), stat, threshold);
        self.cols.value[i] = self.raw[i];
    }

    /// Sets row `i`'s posterior standard deviation.
    #[inline]
    pub fn set_std(&mut self, i: usize, std: f64) {
        self.cols.std[i] = std;
    }

    #[inline]
    fn decide(&mut self, i: usize, status: Status, fault: Option<Fault>, stat: f64, threshold: f64) {
        self.cols.status[i] = status.code();
        self.cols.fault[i] = fault_code(fault);
        self.cols.stat[i] = stat;
        self.cols.threshold[i] = threshold;
    }

    /// All writable columns as slices, for plugins that work column-wise.
    #[inline]
    pub fn columns_mut(&mut self) -> &mut Columns<'a> {
        &mut self.cols
    }
}
