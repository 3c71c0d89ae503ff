//! The process of the demo: the operating timeline (feed setpoint changes,
//! the dryer trip), how each tag's operating point responds to it, and the
//! simulation of the true process value.

use crate::rng::Rng;

use super::catalogue::{TagDef, FEED_BASE};
use super::US_PER_S;

/// What moves the operating points.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Driver {
    /// Change of the milk feed flow setpoint from its base, m3/h.
    Feed,
    /// 1 while the spray dryer is tripped, else 0.
    Trip,
}

/// Shape of a response to a driver `u(t)`, seen after a dead time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) enum Shape {
    /// First-order lag: `y' = (gain u - y) / tau`; adds `y`.
    Lag { tau_s: f64 },
    /// Transient that returns to zero: lag(tau) minus lag(recover) of `gain u`.
    Pulse { tau_s: f64, recover_s: f64 },
    /// Integrates `gain` per hour while `u > 0`; relaxes back to zero with
    /// time constant `relax` while `u = 0` (a tank filling while its outlet
    /// is stopped, then pumped back to its usual level).
    Integrate { relax_s: f64 },
    /// While `u = 1` the value relaxes to the level `gain` (not a change)
    /// with time constant `tau`, and back when `u = 0`: a stopped unit.
    Stop { tau_s: f64 },
}

/// A tag's response to one driver.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct Response {
    pub driver: Driver,
    pub gain: f64,
    pub dead_s: f64,
    pub shape: Shape,
}

pub(super) const fn lag(driver: Driver, gain: f64, dead_s: f64, tau_s: f64) -> Response {
    Response { driver, gain, dead_s, shape: Shape::Lag { tau_s } }
}

pub(super) const fn pulse(driver: Driver, gain: f64, dead_s: f64, tau_s: f64, recover_s: f64) -> Response {
    Response { driver, gain, dead_s, shape: Shape::Pulse { tau_s, recover_s } }
}

pub(super) const fn integrate(driver: Driver, gain_per_h: f64, dead_s: f64, relax_s: f64) -> Response {
    Response { driver, gain: gain_per_h, dead_s, shape: Shape::Integrate { relax_s } }
}

pub(super) const fn stop(driver: Driver, level: f64, dead_s: f64, tau_s: f64) -> Response {
    Response { driver, gain: level, dead_s, shape: Shape::Stop { tau_s } }
}

impl Response {
    /// Time after the driver changes until the response is within about 5 %
    /// of its final change (dead time plus three of its slowest time constants).
    pub fn settle_s(&self) -> f64 {
        let tau = match self.shape {
            Shape::Lag { tau_s } | Shape::Stop { tau_s } => tau_s,
            Shape::Pulse { tau_s, recover_s } => tau_s.max(recover_s),
            Shape::Integrate { relax_s } => relax_s,
        };
        self.dead_s + 3.0 * tau
    }
}

/// The operating timeline of the shift.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Timeline {
    /// Feed setpoint changes: (time µs UTC, new setpoint m3/h), in time order.
    pub feed: Vec<(i64, f64)>,
    /// Dryer trip: [from, to) µs UTC.
    pub trip: (i64, i64),
}

impl Timeline {
    /// Value of a driver at time `t_us`.
    pub fn driver(&self, d: Driver, t_us: i64) -> f64 {
        match d {
            Driver::Feed => {
                self.feed.iter().take_while(|&&(t, _)| t <= t_us).last().map_or(0.0, |&(_, sp)| sp - FEED_BASE)
            }
            Driver::Trip => f64::from(u8::from(self.trip.0 <= t_us && t_us < self.trip.1)),
        }
    }
}

/// The operating point of a tag at `n` samples `start_us + k period_us`.
pub(super) fn operating_point(def: &TagDef, tl: &Timeline, start_us: i64, period_us: i64, n: usize) -> Vec<f64> {
    let dt = period_us as f64 / US_PER_S as f64;
    let decay = |tau: f64| if tau > 0.0 { (-dt / tau).exp() } else { 0.0 };
    let delayed = |r: &Response, t: i64| tl.driver(r.driver, t - (r.dead_s * US_PER_S as f64) as i64);
    // Per response: (state 1, state 2), started in steady state.
    let mut states: Vec<(f64, f64)> = def
        .responses
        .iter()
        .map(|r| {
            let d = delayed(r, start_us);
            match r.shape {
                Shape::Lag { .. } | Shape::Pulse { .. } => (r.gain * d, r.gain * d),
                Shape::Integrate { .. } => (0.0, 0.0),
                Shape::Stop { .. } => (d, 0.0),
            }
        })
        .collect();
    let mut out = Vec::with_capacity(n);
    for k in 0..n {
        let t = start_us + k as i64 * period_us;
        let mut additive = 0.0;
        for (r, s) in def.responses.iter().zip(states.iter_mut()) {
            let u = delayed(r, t);
            match r.shape {
                Shape::Lag { tau_s } => {
                    if k > 0 {
                        let a = decay(tau_s);
                        s.0 = a * s.0 + (1.0 - a) * r.gain * u;
                    }
                    additive += s.0;
                }
                Shape::Pulse { tau_s, recover_s } => {
                    if k > 0 {
                        let (a, b) = (decay(tau_s), decay(recover_s));
                        s.0 = a * s.0 + (1.0 - a) * r.gain * u;
                        s.1 = b * s.1 + (1.0 - b) * r.gain * u;
                    }
                    additive += s.0 - s.1;
                }
                Shape::Integrate { relax_s } => {
                    if k > 0 {
                        if u > 0.0 {
                            s.0 += r.gain * u * dt / 3600.0;
                        } else {
                            s.0 *= decay(relax_s);
                        }
                    }
                    additive += s.0;
                }
                Shape::Stop { tau_s } => {
                    if k > 0 {
                        let a = decay(tau_s);
                        s.0 = a * s.0 + (1.0 - a) * u;
                    }
                }
            }
        }
        let mut op = def.base + additive;
        for (r, s) in def.responses.iter().zip(&states) {
            if let Shape::Stop { .. } = r.shape {
                op = r.gain + (op - r.gain) * (1.0 - s.0);
            }
        }
        out.push(op);
    }
    out
}

/// The true process value of a tag at `n` samples: operating point plus
/// random walk plus AR(1) (see the catalogue's module documentation),
/// clamped to the instrument range.
pub(super) fn truth(def: &TagDef, op: &[f64], period_us: i64, rng: &mut Rng) -> Vec<f64> {
    let dt = period_us as f64 / US_PER_S as f64;
    let phi = if def.ar_tau_s > 0.0 { (-dt / def.ar_tau_s).exp() } else { 0.0 };
    let ar_innov = def.ar_sd * (1.0 - phi * phi).sqrt();
    let walk_step = def.walk * (dt / 3600.0).sqrt();
    let (lo, hi) = def.range;
    let mut a = def.ar_sd * rng.normal();
    let mut w = 0.0;
    let mut out = Vec::with_capacity(op.len());
    for (k, &o) in op.iter().enumerate() {
        if k > 0 {
            a = phi * a + ar_innov * rng.normal();
            w += walk_step * rng.normal();
        }
        let g = if def.proportional && def.base != 0.0 { (o / def.base).clamp(0.0, 1.5) } else { 1.0 };
        out.push((o + g * (w + a)).clamp(lo, hi));
    }
    out
}

/// One-step standard deviation of a reading around its prediction: noise,
/// AR innovation and walk step together (the "sigma" of spike sizes).
pub(super) fn one_step_sigma(def: &TagDef, period_us: i64) -> f64 {
    let dt = period_us as f64 / US_PER_S as f64;
    let phi = if def.ar_tau_s > 0.0 { (-dt / def.ar_tau_s).exp() } else { 0.0 };
    let v = def.noise.powi(2) + def.ar_sd.powi(2) * (1.0 - phi * phi) + def.walk.powi(2) * dt / 3600.0;
    v.sqrt()
}
