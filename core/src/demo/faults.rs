//! What goes wrong in the demo shift: the plan of sensor faults, gaps and
//! uncertain-quality stretches, and how one tag's readings are made from its
//! true values with them.
//!
//! Times in the plans are minutes after the shift start for the reference
//! 8-hour shift. For another length they are stretched in proportion
//! (`at * hours / 8`), and durations are shortened for shifts under 8 hours
//! (`duration * min(1, hours / 8)`), so the schedule keeps its shape. Fault
//! starts are moved by a seeded jitter of up to 3 minutes (scaled the same way).

use crate::series::Fault;

use super::catalogue::TagDef;
use super::{FaultEvent, QUALITY_BAD, QUALITY_EGU_EXCEEDED, QUALITY_GOOD, QUALITY_UNCERTAIN, US_PER_S};

/// Size of a planned fault, before `fault_scale`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) enum PlanSize {
    /// Spike: offset in one-step standard deviations of the tag (signed).
    Sigma(f64),
    /// Step: bias in the tag's units (signed).
    Bias(f64),
    /// Drift: bias rate in the tag's units per hour (signed).
    Rate(f64),
    /// Noise: factor on the measurement noise variance.
    Variance(f64),
    /// Stuck: the reading freezes at the last reading before the fault.
    Freeze,
    /// Range: the reading is pinned beyond the range: above the high limit
    /// by 6.25 % of span (a transmitter driven to its upscale failure
    /// current) or below the low limit by 1.25 % of span; with this quality.
    Pin { high: bool, quality: u8 },
    /// Bad quality: quality 0 with the value 0.0, or with the last reading held.
    Bad { hold: bool },
}

/// One planned sensor fault.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct PlannedFault {
    pub tag: &'static str,
    pub kind: Fault,
    /// Start, minutes after the shift start (8-hour reference).
    pub at_min: f64,
    /// Duration in minutes; 0 for a single sample; `f64::INFINITY` to the end.
    pub dur_min: f64,
    pub size: PlanSize,
    pub note: &'static str,
}

const fn spike(tag: &'static str, at_min: f64, sigma: f64) -> PlannedFault {
    PlannedFault {
        tag,
        kind: Fault::Spike,
        at_min,
        dur_min: 0.0,
        size: PlanSize::Sigma(sigma),
        note: "single-sample outlier",
    }
}

const END: f64 = f64::INFINITY;

/// The sensor faults of the shift.
pub(super) static FAULT_PLAN: &[PlannedFault] = &[
    spike("FT-3113.PV", 40.0, 8.0),
    spike("FT-3113.PV", 95.0, -6.0),
    spike("FT-3113.PV", 170.0, 10.0),
    spike("FT-3113.PV", 265.0, 7.0),
    spike("FT-3113.PV", 400.0, -9.0),
    spike("TT-3309.PV", 55.0, 12.0),
    spike("TT-3309.PV", 205.0, -8.0),
    spike("TT-3309.PV", 345.0, 6.0),
    spike("TT-3309.PV", 455.0, 9.0),
    spike("AT-3230.PV", 75.0, 10.0),
    spike("AT-3230.PV", 285.0, -12.0),
    PlannedFault {
        tag: "TT-3105B.PV",
        kind: Fault::Drift,
        at_min: 60.0,
        dur_min: END,
        size: PlanSize::Rate(0.3),
        note: "redundant transmitter B drifts away from A and C",
    },
    PlannedFault {
        tag: "AT-3307.PV",
        kind: Fault::Noise,
        at_min: 100.0,
        dur_min: 40.0,
        size: PlanSize::Variance(16.0),
        note: "oxygen probe reference air contaminated: noisy reading",
    },
    PlannedFault {
        tag: "PT-3110.PV",
        kind: Fault::Stuck,
        at_min: 130.0,
        dur_min: 25.0,
        size: PlanSize::Freeze,
        note: "vacuum transmitter frozen (impulse line blocked)",
    },
    PlannedFault {
        tag: "FT-3101B.PV",
        kind: Fault::Step,
        at_min: 150.0,
        dur_min: END,
        size: PlanSize::Bias(0.6),
        note: "check meter zero shifted after a cleaning cycle; FT-3101A is trusted",
    },
    PlannedFault {
        tag: "TT-3204.PV",
        kind: Fault::BadQuality,
        at_min: 160.0,
        dur_min: 12.0,
        size: PlanSize::Bad { hold: false },
        note: "I/O card fault: bad quality, value 0",
    },
    PlannedFault {
        tag: "AT-3130.PV",
        kind: Fault::Drift,
        at_min: 180.0,
        dur_min: END,
        size: PlanSize::Rate(-0.2),
        note: "refractometer prism fouling: reading drifts low",
    },
    PlannedFault {
        tag: "PT-3216.PV",
        kind: Fault::Range,
        at_min: 270.0,
        dur_min: 8.0,
        size: PlanSize::Pin { high: true, quality: QUALITY_GOOD },
        note: "transmitter driven to upscale failure current, quality still good",
    },
    PlannedFault {
        tag: "AT-3240.PV",
        kind: Fault::Stuck,
        at_min: 300.0,
        dur_min: 40.0,
        size: PlanSize::Freeze,
        note: "analyser output frozen at its last result",
    },
    PlannedFault {
        tag: "TT-3211.PV",
        kind: Fault::Step,
        at_min: 350.0,
        dur_min: END,
        size: PlanSize::Bias(-2.5),
        note: "sensor replaced without trim: lone bias step",
    },
    PlannedFault {
        tag: "LT-3121.PV",
        kind: Fault::Stuck,
        at_min: 380.0,
        dur_min: 12.0,
        size: PlanSize::Freeze,
        note: "level transmitter frozen",
    },
    PlannedFault {
        tag: "TT-3303.PV",
        kind: Fault::Noise,
        at_min: 400.0,
        dur_min: 25.0,
        size: PlanSize::Variance(9.0),
        note: "loose terminal: noisy reading",
    },
    PlannedFault {
        tag: "FT-3315.PV",
        kind: Fault::Range,
        at_min: 420.0,
        dur_min: 6.0,
        size: PlanSize::Pin { high: false, quality: QUALITY_EGU_EXCEEDED },
        note: "transmitter below its low limit, quality uncertain (engineering units exceeded)",
    },
    PlannedFault {
        tag: "WT-3250.PV",
        kind: Fault::BadQuality,
        at_min: 440.0,
        dur_min: 4.0,
        size: PlanSize::Bad { hold: true },
        note: "scale communication lost: bad quality, last value held",
    },
];

/// A gap: rows of the tags with times in [at, at + dur) are missing.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct PlannedGap {
    /// The tags (an empty list with `area_prefix`: every tag whose name has that loop prefix).
    pub tags: &'static [&'static str],
    /// Loop-number prefix of a whole area (e.g. `33`), or "".
    pub area_prefix: &'static str,
    pub at_min: f64,
    pub dur_min: f64,
    pub cause: &'static str,
}

/// The gaps of the shift.
pub(super) static GAP_PLAN: &[PlannedGap] = &[
    PlannedGap {
        tags: &["TT-3102.PV"],
        area_prefix: "",
        at_min: 70.0,
        dur_min: 1.0,
        cause: "collector missed the tag",
    },
    PlannedGap {
        tags: &["DT-3133.PV"],
        area_prefix: "",
        at_min: 150.0,
        dur_min: 45.0,
        cause: "transmitter taken out of service for cleaning, not stored",
    },
    PlannedGap {
        tags: &["FT-3140.PV"],
        area_prefix: "",
        at_min: 200.0,
        dur_min: 3.0,
        cause: "collector missed the tag",
    },
    PlannedGap {
        tags: &["AT-3141.PV"],
        area_prefix: "",
        at_min: 250.0,
        dur_min: 8.0,
        cause: "analyser interface timeout",
    },
    PlannedGap {
        tags: &[],
        area_prefix: "33",
        at_min: 320.0,
        dur_min: 15.0,
        cause: "boiler house collector node restarted: every boiler house tag missing",
    },
    PlannedGap {
        tags: &["TT-3219.PV"],
        area_prefix: "",
        at_min: 400.0,
        dur_min: 20.0,
        cause: "fieldbus segment reset",
    },
];

/// A stretch of uncertain quality on healthy readings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct PlannedUncertain {
    pub tag: &'static str,
    /// Start (minutes) or, when `during_trip`, ignored: the stretch runs from
    /// the trip to 10 minutes after the restart.
    pub at_min: f64,
    pub dur_min: f64,
    pub during_trip: bool,
    pub cause: &'static str,
}

/// Uncertain-quality stretches (quality 64) that are not faults.
pub(super) static UNCERTAIN_PLAN: &[PlannedUncertain] = &[
    PlannedUncertain {
        tag: "AT-3240.PV",
        at_min: 0.0,
        dur_min: 0.0,
        during_trip: true,
        cause: "no powder at the analyser while the dryer is tripped",
    },
    PlannedUncertain {
        tag: "AT-3241.PV",
        at_min: 0.0,
        dur_min: 0.0,
        during_trip: true,
        cause: "no powder at the analyser while the dryer is tripped",
    },
    PlannedUncertain {
        tag: "PT-3111.PV",
        at_min: 280.0,
        dur_min: 6.0,
        during_trip: false,
        cause: "transmitter under maintenance check, value believed good",
    },
];

/// A planned fault placed on one tag's sample grid, size resolved.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct PlacedFault {
    pub plan: PlannedFault,
    /// First and last affected sample index (inclusive).
    pub first: usize,
    pub last: usize,
    /// Size after `fault_scale`, in the meaning of [`PlanSize`] (sigma converted to units).
    pub size: f64,
}

/// The readings of one tag, before gaps and exception thinning.
pub(super) struct Readings {
    pub value: Vec<f64>,
    pub quality: Vec<u8>,
    /// Fault events (rows still to be counted after gaps).
    pub events: Vec<FaultEvent>,
}

/// Instrument resolution: readings are stored rounded to 10^(floor(log10 span) - 4).
pub(super) fn resolution(def: &TagDef) -> f64 {
    let span = (def.range.1 - def.range.0).abs().max(f64::MIN_POSITIVE);
    10f64.powf(span.log10().floor() - 4.0)
}

/// Rounds to the resolution, cuts low flows, saturates at the range limits.
fn transmit(def: &TagDef, x: f64, res: f64) -> f64 {
    let (lo, hi) = def.range;
    let mut y = x.clamp(lo, hi);
    if def.proportional && y < lo + 0.01 * (hi - lo) {
        y = lo;
    }
    round_to(y, res)
}

fn round_to(x: f64, res: f64) -> f64 {
    if res < 1.0 {
        // Divide by the exact power of ten so the result is the double
        // nearest the decimal (22.4, not 22.400000000000002).
        let scale = (1.0 / res).round();
        (x * scale).round() / scale
    } else {
        (x / res).round() * res
    }
}

/// Makes one tag's readings from its true values: measurement noise
/// (`z` holds the tag's standard normal draws), then the faults.
pub(super) fn readings(
    def: &TagDef,
    ts: &[i64],
    truth: &[f64],
    z: &[f64],
    faults: &[PlacedFault],
    uncertain: &[(usize, usize)],
) -> Readings {
    let n = truth.len();
    let res = resolution(def);
    let period_h = if n > 1 { (ts[1] - ts[0]) as f64 / (3600.0 * US_PER_S as f64) } else { 0.0 };
    let mut bias = vec![0.0; n];
    let mut noise_factor = vec![1.0; n];
    for f in faults {
        match f.plan.size {
            PlanSize::Bias(_) => bias[f.first..=f.last].iter_mut().for_each(|b| *b += f.size),
            PlanSize::Rate(_) => {
                for (j, b) in bias[f.first..=f.last].iter_mut().enumerate() {
                    *b += f.size * j as f64 * period_h;
                }
            }
            PlanSize::Variance(_) => noise_factor[f.first..=f.last].iter_mut().for_each(|m| *m = f.size.sqrt()),
            _ => {}
        }
    }
    let mut value: Vec<f64> =
        (0..n).map(|k| transmit(def, truth[k] + def.noise * noise_factor[k] * z[k] + bias[k], res)).collect();
    let mut quality = vec![QUALITY_GOOD; n];
    for &(a, b) in uncertain {
        quality[a..=b].iter_mut().for_each(|q| *q = QUALITY_UNCERTAIN);
    }
    let (lo, hi) = def.range;
    let span = hi - lo;
    let mut events = Vec::new();
    for f in faults {
        let (first, last) = (f.first, f.last);
        let mut ev = FaultEvent {
            tag: def.name,
            kind: f.plan.kind,
            from_us: ts[first],
            to_us: ts[last],
            size: None,
            value: None,
            rate_per_hour: None,
            bias_end: None,
            rows: 0,
            note: f.plan.note,
        };
        match f.plan.size {
            PlanSize::Sigma(_) => {
                let before = value[first];
                value[first] = transmit(def, before + f.size, res);
                ev.size = Some(round_to(value[first] - before, res));
            }
            PlanSize::Bias(_) => ev.size = Some(f.size),
            PlanSize::Rate(_) => {
                ev.size = Some(f.size);
                ev.rate_per_hour = Some(f.size);
                ev.bias_end = Some(bias[last]);
            }
            PlanSize::Variance(_) => ev.size = Some(f.size),
            PlanSize::Freeze => {
                let held = value[first.saturating_sub(1)];
                value[first..=last].iter_mut().for_each(|v| *v = held);
                ev.value = Some(held);
            }
            PlanSize::Pin { high, quality: q } => {
                let pinned = if high { hi + 0.0625 * span } else { lo - 0.0125 * span };
                let pinned = round_to(pinned, res);
                value[first..=last].iter_mut().for_each(|v| *v = pinned);
                quality[first..=last].iter_mut().for_each(|x| *x = q);
                ev.value = Some(pinned);
                ev.size = Some(if high { pinned - hi } else { pinned - lo });
            }
            PlanSize::Bad { hold } => {
                let v = if hold { value[first.saturating_sub(1)] } else { 0.0 };
                value[first..=last].iter_mut().for_each(|x| *x = v);
                quality[first..=last].iter_mut().for_each(|x| *x = QUALITY_BAD);
                ev.value = Some(v);
            }
        }
        events.push(ev);
    }
    Readings { value, quality, events }
}
