//! Input times: text forms, integer epochs, and local (naive) times in the
//! site's time zone with the daylight-saving rule.
//!
//! # The daylight-saving rule
//!
//! A naive time (no offset, no zone) is a wall-clock time in the site's zone.
//!
//! - A local time that does not exist (the hour skipped when the clocks jump
//!   forward in spring) is an error naming the file and the row.
//! - A local time that exists twice (the hour repeated when the clocks go
//!   back in autumn) is resolved by the order of the rows: the first
//!   occurrence of the repeated hour is the earlier (daylight-saving)
//!   instant. As soon as a repeated time does not move forward from the
//!   previous repeated time (same local date; per tag for long files, per
//!   file row for wide files, carried from file to file in the order the
//!   files are given), the rest of the repeated hour is the later (standard
//!   time) instant. A sequence `02:00, 02:30, 02:00, 02:30` (Europe/Berlin,
//!   2026-10-25) is therefore read as 00:00Z, 00:30Z, 01:00Z, 01:30Z.
//! - A file (or tag) that starts inside the repeated hour is read as the
//!   first pass; the rule cannot know more from naive times. Export with a
//!   UTC offset (or in UTC) to avoid both questions.

use chrono::{DateTime, NaiveDateTime, Offset, TimeZone};
use chrono_tz::Tz;

use crate::pipeline::EpochUnit;

/// Microseconds in an hour.
const HOUR_US: i64 = 3_600_000_000;
/// Microseconds in a day.
const DAY_US: i64 = 24 * HOUR_US;

/// A time as read from a file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum TimeVal {
    /// An instant: microseconds since 1970-01-01T00:00:00Z.
    Instant(i64),
    /// A wall-clock time in the site's zone, as microseconds since
    /// 1970-01-01T00:00:00 on that clock.
    Local(i64),
}

/// An integer epoch in `unit` to microseconds (floored for nanoseconds);
/// `None` on overflow.
pub(super) fn epoch_to_us(v: i64, unit: EpochUnit) -> Option<i64> {
    match unit {
        EpochUnit::Seconds => v.checked_mul(1_000_000),
        EpochUnit::Milliseconds => v.checked_mul(1_000),
        EpochUnit::Microseconds => Some(v),
        EpochUnit::Nanoseconds => Some(v.div_euclid(1_000)),
    }
}

/// The name of an epoch unit, for messages.
pub(super) fn unit_name(unit: EpochUnit) -> &'static str {
    match unit {
        EpochUnit::Seconds => "seconds",
        EpochUnit::Milliseconds => "milliseconds",
        EpochUnit::Microseconds => "microseconds",
        EpochUnit::Nanoseconds => "nanoseconds",
    }
}

/// Text forms of a CSV time (for error messages).
pub(super) const TIME_FORMS: &str = "expected RFC 3339 such as 2026-03-01T06:00:05Z or 2026-03-01T07:00:05+01:00, a local date and time without offset such as 2026-03-01 06:00:05, or a whole-number epoch";

/// A CSV time: an integer is an epoch in `unit`; RFC 3339 text with `Z` or
/// an offset is an instant; a date and time without offset (`T` or a space
/// between them, optional fraction) is a local time.
pub(super) fn parse_time_text(s: &str, unit: EpochUnit) -> Result<TimeVal, String> {
    if s.is_empty() {
        return Err("the time is empty".to_string());
    }
    let digits = s.strip_prefix(['-', '+']).unwrap_or(s);
    if !digits.is_empty() && digits.bytes().all(|b| b.is_ascii_digit()) {
        return s
            .parse::<i64>()
            .ok()
            .and_then(|v| epoch_to_us(v, unit))
            .map(TimeVal::Instant)
            .ok_or_else(|| format!("epoch {} out of range", unit_name(unit)));
    }
    if let Ok(t) = DateTime::parse_from_rfc3339(s) {
        return Ok(TimeVal::Instant(t.timestamp_micros()));
    }
    for fmt in ["%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%d %H:%M:%S%.f"] {
        if let Ok(t) = NaiveDateTime::parse_from_str(s, fmt) {
            return Ok(TimeVal::Local(t.and_utc().timestamp_micros()));
        }
    }
    Err(TIME_FORMS.to_string())
}

/// A local time (microseconds on the local clock) as text, for messages.
pub(super) fn format_local(local_us: i64) -> String {
    match DateTime::from_timestamp_micros(local_us) {
        Some(t) => t.naive_utc().format("%Y-%m-%d %H:%M:%S%.f").to_string(),
        None => format!("{local_us} us on the local clock"),
    }
}

/// What a local time is in the zone.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Resolved {
    /// One instant.
    Single(i64),
    /// Two instants (the repeated hour), earlier first.
    Ambiguous(i64, i64),
    /// No instant (the skipped hour).
    Gap,
    /// Beyond the calendar.
    OutOfRange,
}

/// Resolves local times in one zone, remembering the offset of the last
/// local hour looked up (rows come mostly in time order, so nearly every
/// lookup is one subtraction).
#[derive(Debug, Clone)]
pub(super) struct LocalResolver {
    tz: Tz,
    /// The local hour (local microseconds / one hour) of the cache, and the
    /// offset (local minus UTC, microseconds) valid over the whole hour;
    /// `None` when the hour holds a transition.
    cache: Option<(i64, Option<i64>)>,
}

impl LocalResolver {
    pub(super) fn new(tz: Tz) -> Self {
        LocalResolver { tz, cache: None }
    }

    /// The zone.
    pub(super) fn tz(&self) -> Tz {
        self.tz
    }

    /// The instant(s) of a local time.
    pub(super) fn resolve(&mut self, local_us: i64) -> Resolved {
        let hour = local_us.div_euclid(HOUR_US);
        let offset = match self.cache {
            Some((h, off)) if h == hour => off,
            _ => {
                let off = self.uniform_offset(hour);
                self.cache = Some((hour, off));
                off
            }
        };
        match offset.and_then(|o| local_us.checked_sub(o)) {
            Some(utc) => Resolved::Single(utc),
            None => self.resolve_exact(local_us),
        }
    }

    /// The offset of a local hour if both its ends have one and the same
    /// offset (no transition inside; zones have at most one per hour).
    fn uniform_offset(&self, hour: i64) -> Option<i64> {
        let start = hour.checked_mul(HOUR_US)?;
        let end = start.checked_add(HOUR_US - 1)?;
        match (self.resolve_exact(start), self.resolve_exact(end)) {
            (Resolved::Single(a), Resolved::Single(b)) if start - a == end - b => Some(start - a),
            _ => None,
        }
    }

    fn resolve_exact(&self, local_us: i64) -> Resolved {
        let Some(naive) = DateTime::from_timestamp_micros(local_us).map(|t| t.naive_utc()) else {
            return Resolved::OutOfRange;
        };
        let utc = |t: DateTime<Tz>| {
            let off = i64::from(t.offset().fix().local_minus_utc()) * 1_000_000;
            local_us.checked_sub(off)
        };
        match self.tz.from_local_datetime(&naive) {
            chrono::LocalResult::Single(t) => utc(t).map_or(Resolved::OutOfRange, Resolved::Single),
            chrono::LocalResult::Ambiguous(a, b) => match (utc(a), utc(b)) {
                (Some(x), Some(y)) => Resolved::Ambiguous(x.min(y), x.max(y)),
                _ => Resolved::OutOfRange,
            },
            chrono::LocalResult::None => Resolved::Gap,
        }
    }
}

/// The state of the daylight-saving rule for one sequence of rows (a tag of
/// a long file, the rows of a wide file): see the module documentation.
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct FoldState {
    /// Local date (days since 1970-01-01 on the local clock) of the repeated
    /// hour being read, the last repeated time seen, and whether the second
    /// pass has begun.
    current: Option<(i64, i64, bool)>,
}

impl FoldState {
    /// Picks one of the two instants of a repeated local time.
    pub(super) fn pick(&mut self, local_us: i64, earlier: i64, later: i64) -> i64 {
        let day = local_us.div_euclid(DAY_US);
        let second = match self.current {
            Some((d, last, second)) if d == day => second || local_us <= last,
            _ => false,
        };
        self.current = Some((day, local_us, second));
        if second {
            later
        } else {
            earlier
        }
    }
}

/// A local time to an instant under the daylight-saving rule; `Err(reason)`
/// for a time in the skipped hour or beyond the calendar.
pub(super) fn local_to_utc(r: &mut LocalResolver, fold: &mut FoldState, local_us: i64) -> Result<i64, String> {
    match r.resolve(local_us) {
        Resolved::Single(u) => Ok(u),
        Resolved::Ambiguous(e, l) => Ok(fold.pick(local_us, e, l)),
        Resolved::Gap => Err(format!(
            "local time {} does not exist in {} (the clocks jump forward over it when daylight saving starts)",
            format_local(local_us),
            r.tz().name()
        )),
        Resolved::OutOfRange => Err("out of the calendar's range".to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const T0: i64 = 1_772_344_800_000_000; // 2026-03-01T06:00:00Z

    fn local(s: &str) -> i64 {
        match parse_time_text(s, EpochUnit::Seconds).unwrap() {
            TimeVal::Local(l) => l,
            other => panic!("{s}: {other:?}"),
        }
    }

    #[test]
    fn text_forms_and_epoch_units() {
        let p = |s: &str, u| parse_time_text(s, u).unwrap();
        assert_eq!(p("2026-03-01T06:00:00Z", EpochUnit::Seconds), TimeVal::Instant(T0));
        assert_eq!(p("2026-03-01T07:00:00+01:00", EpochUnit::Seconds), TimeVal::Instant(T0));
        assert_eq!(p("2026-03-01 06:00:00.5", EpochUnit::Seconds), TimeVal::Local(T0 + 500_000));
        assert_eq!(p("2026-03-01T06:00:00", EpochUnit::Seconds), TimeVal::Local(T0));
        assert_eq!(p("1772344800", EpochUnit::Seconds), TimeVal::Instant(T0));
        assert_eq!(p("1772344800000", EpochUnit::Milliseconds), TimeVal::Instant(T0));
        assert_eq!(p("1772344800000000", EpochUnit::Microseconds), TimeVal::Instant(T0));
        assert_eq!(p("1772344800000000999", EpochUnit::Nanoseconds), TimeVal::Instant(T0));
        assert_eq!(p("-1", EpochUnit::Nanoseconds), TimeVal::Instant(-1), "floored");
        assert!(parse_time_text("99999999999999999", EpochUnit::Seconds).unwrap_err().contains("out of range"));
        for bad in ["", "2026-03-01", "06:00", "2026-03-01 25:00:00", "1.5", "noon"] {
            assert!(parse_time_text(bad, EpochUnit::Seconds).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn berlin_spring_gap_is_an_error() {
        let mut r = LocalResolver::new(chrono_tz::Europe::Berlin);
        let mut f = FoldState::default();
        let e = local_to_utc(&mut r, &mut f, local("2026-03-29 02:30:00")).unwrap_err();
        assert!(e.contains("local time 2026-03-29 02:30:00 does not exist in Europe/Berlin"), "{e}");
        // Either side of the gap.
        let before = local_to_utc(&mut r, &mut f, local("2026-03-29 01:59:59")).unwrap();
        let after = local_to_utc(&mut r, &mut f, local("2026-03-29 03:00:00")).unwrap();
        assert_eq!(after - before, 1_000_000);
    }

    #[test]
    fn berlin_autumn_repeat_follows_row_order() {
        let mut r = LocalResolver::new(chrono_tz::Europe::Berlin);
        let mut f = FoldState::default();
        let z = |s: &str| DateTime::parse_from_rfc3339(s).unwrap().timestamp_micros();
        let rows = ["2026-10-25 01:30:00", "2026-10-25 02:00:00", "2026-10-25 02:30:00", "2026-10-25 02:00:00"];
        let rows2 = ["2026-10-25 02:30:00", "2026-10-25 03:00:00"];
        let got: Vec<i64> =
            rows.iter().chain(&rows2).map(|s| local_to_utc(&mut r, &mut f, local(s)).unwrap()).collect();
        let want = [
            "2026-10-24T23:30:00Z",
            "2026-10-25T00:00:00Z",
            "2026-10-25T00:30:00Z",
            "2026-10-25T01:00:00Z",
            "2026-10-25T01:30:00Z",
            "2026-10-25T02:00:00Z",
        ]
        .map(z);
        assert_eq!(got, want);
    }

    #[test]
    fn repeated_time_itself_starts_the_second_pass() {
        // Hourly samples: 02:00 twice.
        let mut r = LocalResolver::new(chrono_tz::Europe::Berlin);
        let mut f = FoldState::default();
        let a = local_to_utc(&mut r, &mut f, local("2026-10-25 02:00:00")).unwrap();
        let b = local_to_utc(&mut r, &mut f, local("2026-10-25 02:00:00")).unwrap();
        assert_eq!(b - a, 3_600_000_000);
        // A fresh sequence (another tag) starts on the first pass again.
        let mut g = FoldState::default();
        assert_eq!(local_to_utc(&mut r, &mut g, local("2026-10-25 02:00:00")).unwrap(), a);
    }

    #[test]
    fn resolver_cache_agrees_with_exact_lookup() {
        for tz in
            [chrono_tz::Europe::Berlin, chrono_tz::America::New_York, chrono_tz::Australia::Lord_Howe, chrono_tz::UTC]
        {
            let mut r = LocalResolver::new(tz);
            let start = local("2026-01-01 00:00:00");
            // Every 7 minutes 13 seconds for a year, both directions.
            let step = 433_000_000;
            let n = 365 * 24 * 3_600_000_000 / step;
            for k in (0..n).chain((0..n).rev()) {
                let l = start + k * step;
                assert_eq!(r.resolve(l), r.resolve_exact(l), "{tz} {}", format_local(l));
            }
        }
    }

    #[test]
    fn utc_zone_is_identity() {
        let mut r = LocalResolver::new(chrono_tz::UTC);
        let mut f = FoldState::default();
        assert_eq!(local_to_utc(&mut r, &mut f, T0).unwrap(), T0);
        assert!(local_to_utc(&mut r, &mut f, i64::MAX).is_err());
    }
}
