//! The step's YAML parameters: raw (as written, unknown keys refused), then
//! checked ([`DriftParams`]), then resolved for one group ([`GroupParams`])
//! once the rule's range is known.

use serde::Deserialize;
use tagwright::pipeline::parse_duration_us;

/// Default tolerance as a fraction of the instrument span: 0.5 %.
pub const DEFAULT_TOLERANCE_OF_SPAN: f64 = 0.005;
/// Default drift rate: a quarter of the tolerance per hour.
pub const DEFAULT_RATE_PER_TOLERANCE: f64 = 0.25;
/// Default half-window of the abrupt-change test.
pub const DEFAULT_STEP_WINDOW: &str = "5m";
/// Default threshold of the standardised abrupt-change statistic.
pub const DEFAULT_STEP_THRESHOLD: f64 = 5.5;
/// Default smallest abrupt change handled as a step, as a fraction of the tolerance.
pub const DEFAULT_STEP_MIN_OF_TOLERANCE: f64 = 0.5;

/// The parameters as written in the pipeline.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawParams {
    tolerance: Option<f64>,
    drift_rate: Option<f64>,
    correct: Option<bool>,
    step_window: Option<String>,
    step_threshold: Option<f64>,
    step_min: Option<f64>,
    fill_rejected: Option<bool>,
}

/// Checked parameters of a `drift` step (see `docs/drift.md`).
#[derive(Debug, Clone, PartialEq)]
pub struct DriftParams {
    /// Largest acceptable |bias|, tag units (None: 0.5 % of the rule's range span).
    pub tolerance: Option<f64>,
    /// Rate at which a bias may wander, tag units per hour (None: tolerance / 4 per hour).
    pub drift_rate: Option<f64>,
    /// Replace readings of attributed members beyond the tolerance by raw - bias.
    pub correct: bool,
    /// Half-window of the abrupt-change test, µs.
    pub step_window_us: i64,
    /// Threshold of the standardised abrupt-change statistic.
    pub step_threshold: f64,
    /// Smallest abrupt change handled as a step, tag units (None: tolerance / 2).
    pub step_min: Option<f64>,
    /// Give rejected readings of an attributable group the group's estimate.
    pub fill_rejected: bool,
}

impl Default for DriftParams {
    fn default() -> Self {
        DriftParams {
            tolerance: None,
            drift_rate: None,
            correct: true,
            step_window_us: 300_000_000,
            step_threshold: DEFAULT_STEP_THRESHOLD,
            step_min: None,
            fill_rejected: true,
        }
    }
}

fn positive(name: &str, v: Option<f64>) -> Result<Option<f64>, String> {
    match v {
        Some(x) if !(x.is_finite() && x > 0.0) => {
            Err(format!("step `drift`: `{name}` must be a finite number > 0, not {x}"))
        }
        _ => Ok(v),
    }
}

impl DriftParams {
    /// Parses and checks the YAML parameters (`null`: all defaults).
    pub fn from_yaml(params: &serde_json::Value) -> Result<Self, String> {
        let raw: RawParams = tagwright::plugin::parse_params("drift", params)?;
        let d = DriftParams::default();
        let step_window_us = match &raw.step_window {
            Some(text) => parse_duration_us(text).map_err(|e| format!("step `drift`: `step_window`: {e}"))?,
            None => d.step_window_us,
        };
        if step_window_us <= 0 {
            return Err("step `drift`: `step_window` must be longer than zero".into());
        }
        let step_threshold = positive("step_threshold", raw.step_threshold)?.unwrap_or(d.step_threshold);
        if step_threshold < 3.0 {
            return Err(format!(
                "step `drift`: `step_threshold` {step_threshold} is below 3, which would call noise a step many \
                 times a shift; use 3 or more (default {DEFAULT_STEP_THRESHOLD})"
            ));
        }
        let step_min = match raw.step_min {
            Some(x) if !(x.is_finite() && x >= 0.0) => {
                return Err(format!("step `drift`: `step_min` must be a finite number >= 0, not {x}"))
            }
            v => v,
        };
        Ok(DriftParams {
            tolerance: positive("tolerance", raw.tolerance)?,
            drift_rate: positive("drift_rate", raw.drift_rate)?,
            correct: raw.correct.unwrap_or(d.correct),
            step_window_us,
            step_threshold,
            step_min,
            fill_rejected: raw.fill_rejected.unwrap_or(d.fill_rejected),
        })
    }

    /// The parameters for one group, with the defaults that depend on the
    /// instrument range filled in. `Err` says what is missing.
    pub fn resolve(&self, range: Option<(f64, f64)>) -> Result<GroupParams, String> {
        let tolerance = match (self.tolerance, range) {
            (Some(t), _) => t,
            (None, Some((lo, hi))) if hi > lo && (hi - lo).is_finite() => DEFAULT_TOLERANCE_OF_SPAN * (hi - lo),
            _ => {
                return Err("no tolerance: set `drift: {tolerance: X}` (tag units) or `range: [low, high]` on the \
                            rule (the default tolerance is 0.5 % of the span)"
                    .into())
            }
        };
        Ok(GroupParams {
            tolerance,
            drift_rate: self.drift_rate.unwrap_or(DEFAULT_RATE_PER_TOLERANCE * tolerance),
            correct: self.correct,
            step_window_us: self.step_window_us,
            step_threshold: self.step_threshold,
            step_min: self.step_min.unwrap_or(DEFAULT_STEP_MIN_OF_TOLERANCE * tolerance),
            fill_rejected: self.fill_rejected,
        })
    }
}

/// Parameters of the step for one group, every default resolved.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupParams {
    pub tolerance: f64,
    pub drift_rate: f64,
    pub correct: bool,
    pub step_window_us: i64,
    pub step_threshold: f64,
    pub step_min: f64,
    pub fill_rejected: bool,
}

impl GroupParams {
    /// Variance per nominal period of a bias random walk that moves by about
    /// `drift_rate` (one standard deviation) in one hour:
    /// q = drift_rate^2 * period / 1 h.
    pub fn q_bias(&self, period_us: i64) -> f64 {
        self.drift_rate * self.drift_rate * period_us as f64 / 3.6e9
    }
}
