//! The bias carried from one run to the next (`TagWork::state["drift"]`).
//!
//! ```json
//! {"version": 1, "reference": "process", "bias_end": 0.61, "bias_end_std": 0.02, "after_step": true, "ts_us": 1767250800000000}
//! ```
//!
//! `reference` is `"process"` for a member whose own bias was estimated
//! (a trusted pair, three or more members), or the name of the other member
//! for a pair without a trusted member (the bias is then the difference
//! between the two). A member held unbiased, or one whose bias was not
//! estimated, stores `bias_end: null`. At the start of the next run a
//! carried bias with the same reference is the prior of the member's bias
//! state (variance grown by the bias random walk over the time between the
//! runs), unless the first readings of the new window contradict it.
//! `after_step` says the bias came from a step found in an earlier run, so
//! the new run keeps labelling readings beyond the tolerance `step`.

use serde::{Deserialize, Serialize};

/// Key of the step's entry in the tag's state.
pub const KEY: &str = "drift";

/// A member's carried bias.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Carried {
    pub version: u32,
    pub reference: String,
    pub bias_end: f64,
    pub bias_end_std: f64,
    /// The bias at the end followed a step (rows beyond the tolerance are `step`).
    #[serde(default)]
    pub after_step: bool,
    /// Time of the bias, µs UTC.
    pub ts_us: i64,
}

/// Reads a member's carried bias if it refers to `reference` and is usable.
pub fn read(state: &std::collections::BTreeMap<String, serde_json::Value>, reference: &str) -> Option<Carried> {
    let c: Carried = serde_json::from_value(state.get(KEY)?.clone()).ok()?;
    (c.version == 1 && c.reference == reference && c.bias_end.is_finite() && c.bias_end_std.is_finite()).then_some(c)
}

/// The value to store for a member.
pub fn value(reference: &str, bias: Option<(f64, f64)>, after_step: bool, ts_us: i64) -> serde_json::Value {
    let num = |v: f64| serde_json::Number::from_f64(v).map_or(serde_json::Value::Null, serde_json::Value::Number);
    let (b, s) = match bias {
        Some((b, s)) if b.is_finite() && s.is_finite() => (num(b), num(s)),
        _ => (serde_json::Value::Null, serde_json::Value::Null),
    };
    serde_json::json!({
        "version": 1, "reference": reference, "bias_end": b, "bias_end_std": s, "after_step": after_step, "ts_us": ts_us
    })
}
