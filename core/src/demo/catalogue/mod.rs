//! The tag catalogue of Demo Dairy Unit 3 and each tag's process model.
//!
//! A tag's true value is its operating point (a base value moved by the
//! process events through the tag's [`Response`]s) plus a slow random walk
//! and an AR(1) fluctuation; the reading adds white measurement noise. All
//! magnitudes are in the tag's units:
//!
//! ```text
//! x_k = op_k + g_k (w_k + a_k)                      true process value
//! w_k = w_{k-1} + walk sqrt(dt / 1 h) eta_k          random-walk level, w_0 = 0
//! a_k = phi a_{k-1} + ar_sd sqrt(1 - phi^2) eps_k    AR(1), phi = exp(-dt / ar_tau), a_0 ~ N(0, ar_sd^2)
//! y_k = x_k + noise nu_k                             reading (before faults)
//! ```
//!
//! with eta, eps, nu independent standard normal draws and g_k = 1, or for a
//! `proportional` tag (flows, pump pressure, powder rate) g_k = op_k / base
//! clamped to [0, 1.5], so that a stopped flow is quiet.

mod boiler_house;
mod evaporator;
mod spray_dryer;

use super::process::{Driver, Response};
use super::Area;

/// Driver shorthands for the area files.
const FEED: Driver = Driver::Feed;
const TRIP: Driver = Driver::Trip;

/// One tag of the catalogue with its process model.
#[derive(Debug, Clone, Copy)]
pub(super) struct TagDef {
    pub name: &'static str,
    pub description: &'static str,
    pub area: Area,
    pub units: &'static str,
    /// Instrument range [low, high].
    pub range: (f64, f64),
    /// Nominal period (scan period for exception-reported tags), seconds.
    pub period_s: i64,
    /// Exception reporting: stored only when the reading moved by more than this.
    pub deadband: Option<f64>,
    /// Operating point before any process event.
    pub base: f64,
    /// Random-walk standard deviation over one hour.
    pub walk: f64,
    /// Stationary standard deviation of the AR(1) fluctuation.
    pub ar_sd: f64,
    /// Correlation time of the AR(1) fluctuation, seconds.
    pub ar_tau_s: f64,
    /// Measurement noise standard deviation.
    pub noise: f64,
    /// How the process events move the operating point.
    pub responses: &'static [Response],
    /// Fluctuations scale with the operating point; readings below 1 % of
    /// span are cut to the range low (a flowmeter's low-flow cut-off).
    pub proportional: bool,
    /// Measures the same process value as the named tag (redundant
    /// transmitters): the truth and the responses are that tag's.
    pub shares: Option<&'static str>,
}

const EVAP: TagDef = TagDef {
    name: "",
    description: "",
    area: Area::Evaporator,
    units: "",
    range: (0.0, 100.0),
    period_s: 5,
    deadband: None,
    base: 0.0,
    walk: 0.0,
    ar_sd: 0.0,
    ar_tau_s: 60.0,
    noise: 0.0,
    responses: &[],
    proportional: false,
    shares: None,
};
const DRYER: TagDef = TagDef { area: Area::SprayDryer, ..EVAP };
const BOILER: TagDef = TagDef { area: Area::BoilerHouse, ..EVAP };

/// Milk feed flow before the first setpoint change, m3/h.
pub(super) const FEED_BASE: f64 = 22.0;

/// The redundant sets: (group name, members, trusted member).
pub(super) static GROUPS: &[(&str, &[&str], Option<&str>)] = &[
    ("FT-3101", &["FT-3101A.PV", "FT-3101B.PV"], Some("FT-3101A.PV")),
    ("TT-3105", &["TT-3105A.PV", "TT-3105B.PV", "TT-3105C.PV"], None),
];

/// Every tag of the catalogue (61), area by area.
pub(super) fn all() -> impl Iterator<Item = &'static TagDef> {
    evaporator::TAGS.iter().chain(spray_dryer::TAGS).chain(boiler_house::TAGS)
}

/// The definition whose truth and responses a tag uses (itself, or the tag it shares with).
pub(super) fn process_def(def: &'static TagDef) -> &'static TagDef {
    match def.shares {
        Some(owner) => all().find(|d| d.name == owner).unwrap_or(def),
        None => def,
    }
}
