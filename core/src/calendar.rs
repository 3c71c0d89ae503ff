//! Run windows: times given on the command line and the site's shift calendar.
//!
//! Times are RFC 3339 (`2026-03-02T06:00:00+01:00`, `...Z`) or local wall-clock
//! time in the site's time zone (`2026-03-02 06:00`, `2026-03-02T06:00:00`, or a
//! date alone for midnight). A local time that does not exist (the hour skipped
//! when clocks go forward) is an error; an ambiguous one (the hour repeated when
//! clocks go back) takes the earlier instant.
//!
//! Shifts: `--shift 2026-03-02/early` is the `early` shift that starts on that
//! local date; `--shift early` the latest `early` shift that has ended;
//! `--shift last` the latest shift of any name that has ended. The window is
//! [start, start + hours).

use chrono::{DateTime, Duration, LocalResult, NaiveDate, NaiveDateTime, NaiveTime, TimeZone, Utc};
use chrono_tz::Tz;

use crate::pipeline::ShiftSpec;

/// A local wall-clock time in `tz` as µs UTC, with the stated DST rules.
pub fn local_to_utc_us(tz: Tz, naive: NaiveDateTime) -> Result<i64, String> {
    match tz.from_local_datetime(&naive) {
        LocalResult::Single(t) => Ok(t.timestamp_micros()),
        LocalResult::Ambiguous(early, _) => Ok(early.timestamp_micros()),
        LocalResult::None => Err(format!("{naive} does not exist in {tz} (clocks go forward)")),
    }
}

/// Parses a time given on the command line.
pub fn parse_time(text: &str, tz: Tz) -> Result<i64, String> {
    let t = text.trim();
    if let Ok(dt) = DateTime::parse_from_rfc3339(t) {
        return Ok(dt.timestamp_micros());
    }
    for fmt in ["%Y-%m-%d %H:%M:%S", "%Y-%m-%dT%H:%M:%S", "%Y-%m-%d %H:%M", "%Y-%m-%dT%H:%M"] {
        if let Ok(n) = NaiveDateTime::parse_from_str(t, fmt) {
            return local_to_utc_us(tz, n);
        }
    }
    if let Ok(d) = NaiveDate::parse_from_str(t, "%Y-%m-%d") {
        return local_to_utc_us(tz, d.and_time(NaiveTime::MIN));
    }
    Err(format!("`{text}` is not a time: use RFC 3339 (2026-03-02T06:00:00Z) or local time (2026-03-02 06:00)"))
}

fn shift_on(date: NaiveDate, s: &ShiftSpec, tz: Tz) -> Result<(i64, i64), String> {
    let start = local_to_utc_us(tz, date.and_time(s.start))?;
    Ok((start, start + (s.hours * 3600e6).round() as i64))
}

/// The window [from, to) and a label for a `--shift` argument.
pub fn shift_window(shifts: &[ShiftSpec], arg: &str, tz: Tz, now: DateTime<Utc>) -> Result<(i64, i64, String), String> {
    if shifts.is_empty() {
        return Err("the pipeline defines no shifts (add a `shifts:` list)".into());
    }
    let names = || shifts.iter().map(|s| s.name.as_str()).collect::<Vec<_>>().join(", ");
    if let Some((date, name)) = arg.split_once('/') {
        let date = NaiveDate::parse_from_str(date.trim(), "%Y-%m-%d")
            .map_err(|_| format!("`{date}` in --shift {arg} is not a date (YYYY-MM-DD)"))?;
        let s = shifts
            .iter()
            .find(|s| s.name == name.trim())
            .ok_or_else(|| format!("no shift named `{name}`; the pipeline has: {}", names()))?;
        let (a, b) = shift_on(date, s, tz)?;
        return Ok((a, b, format!("{date}/{}", s.name)));
    }
    let wanted: Vec<&ShiftSpec> = if arg == "last" {
        shifts.iter().collect()
    } else {
        let s: Vec<&ShiftSpec> = shifts.iter().filter(|s| s.name == arg).collect();
        if s.is_empty() {
            return Err(format!("no shift named `{arg}`; the pipeline has: {} (or use DATE/NAME or `last`)", names()));
        }
        s
    };
    let now_us = now.timestamp_micros();
    let today = now.with_timezone(&tz).date_naive();
    let mut best: Option<(i64, i64, String)> = None;
    for back in 0..3 {
        let date = today - Duration::days(back);
        for s in &wanted {
            let Ok((a, b)) = shift_on(date, s, tz) else { continue };
            if b <= now_us && best.as_ref().is_none_or(|x| b > x.1) {
                best = Some((a, b, format!("{date}/{}", s.name)));
            }
        }
    }
    best.ok_or_else(|| format!("no `{arg}` shift has ended in the last two days"))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn shifts() -> Vec<ShiftSpec> {
        let t = |h| NaiveTime::from_hms_opt(h, 0, 0).unwrap();
        vec![
            ShiftSpec { name: "early".into(), start: t(6), hours: 8.0 },
            ShiftSpec { name: "late".into(), start: t(14), hours: 8.0 },
            ShiftSpec { name: "night".into(), start: t(22), hours: 8.0 },
        ]
    }

    #[test]
    fn times_and_dst_rules() {
        let tz: Tz = "Europe/Berlin".parse().unwrap();
        // CET is UTC+1 in March before the change.
        assert_eq!(parse_time("2026-03-02 06:00", tz).unwrap(), parse_time("2026-03-02T05:00:00Z", tz).unwrap());
        // 2026-03-29 02:30 does not exist in Europe/Berlin (clocks go from 02:00 to 03:00).
        assert!(parse_time("2026-03-29 02:30", tz).unwrap_err().contains("does not exist"));
        // 2026-10-25 02:30 happens twice; the earlier (CEST, UTC+2) instant is taken.
        assert_eq!(parse_time("2026-10-25 02:30", tz).unwrap(), parse_time("2026-10-25T00:30:00Z", tz).unwrap());
        assert!(parse_time("yesterday", tz).is_err());
    }

    #[test]
    fn shift_windows() {
        let tz: Tz = "Europe/Berlin".parse().unwrap();
        let now = DateTime::parse_from_rfc3339("2026-03-02T15:00:00Z").unwrap().with_timezone(&Utc);
        let (a, b, label) = shift_window(&shifts(), "2026-03-02/early", tz, now).unwrap();
        assert_eq!(label, "2026-03-02/early");
        assert_eq!(b - a, 8 * 3600 * 1_000_000);
        assert_eq!(a, parse_time("2026-03-02T05:00:00Z", tz).unwrap());
        // At 16:00 local the latest ended shift is today's early (06:00-14:00).
        assert_eq!(shift_window(&shifts(), "last", tz, now).unwrap().2, "2026-03-02/early");
        // The latest ended night shift started yesterday at 22:00.
        assert_eq!(shift_window(&shifts(), "night", tz, now).unwrap().2, "2026-03-01/night");
        assert!(shift_window(&shifts(), "2026-03-02/lunch", tz, now).unwrap_err().contains("early, late, night"));
        // A shift lasts its hours of real time from its local start, also across the
        // spring-forward change (night of 2026-03-28/29).
        let (a, b, _) = shift_window(&shifts(), "2026-03-28/night", tz, now).unwrap();
        assert_eq!(b - a, 8 * 3600 * 1_000_000);
    }
}
