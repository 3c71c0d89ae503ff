//! A transmitter in no redundant group: its drift cannot be told from a
//! change of the process, so nothing is flagged or corrected, and every
//! verdict says it cannot attribute. What the step can say, and does, is how
//! far the reading moved over the window; a movement beyond the tolerance
//! also gets a note for the technician (check against an independent
//! measurement). A movement within the tolerance is no all-clear: a drift
//! the process happened to offset moves the reading little (seen in the
//! quality benchmark: 0.70 injected, 0.14 moved).
//!
//! The movement is the median of the usable readings in the last eighth of
//! the window minus the median of those in the first eighth (medians, so a
//! spike left in the data does not move it; an eighth, so the noise of the
//! two medians is small against a tolerance while a drift that runs through
//! the window is seen at about 7/8 of its size).

use serde_json::{json, Value};
use tagwright::engine::time_text;
use tagwright::plugin::TagWork;
use tagwright::series::{Fault, Status};

use crate::model::median;
use crate::params::GroupParams;

/// Share of the window at each end whose readings give the two medians.
const EDGE: f64 = 1.0 / 8.0;
/// Fewest usable readings at each end for a verdict.
const MIN_EDGE_READINGS: usize = 5;

/// The verdict when the reading moved beyond the tolerance.
pub const MOVED: &str = "moved, no redundant member (cannot attribute)";
/// The verdict when the reading moved less than the tolerance.
pub const MOVED_WITHIN: &str = "moved within tolerance, no redundant member (cannot attribute)";
/// The verdict when either end of the window has too few usable readings.
pub const NOT_ASSESSED: &str =
    "not assessed (too few usable readings at the ends of the window), no redundant member (cannot attribute)";

/// The movement of one lone transmitter over the window: `extra.drift` and
/// a note for the technician. Rows are not changed.
pub fn report(w: &mut TagWork, gp: &GroupParams) {
    let t = &w.table;
    // Usable: kept readings, and readings an earlier step judged a level
    // fault (a step or drift is what this report is about).
    let usable: Vec<usize> = (0..t.len())
        .filter(|&i| {
            t.status[i] == Status::Ok
                && t.raw[i].is_finite()
                && matches!(t.fault[i], None | Some(Fault::Step) | Some(Fault::Drift))
        })
        .collect();
    let (first, last) = match (usable.first(), usable.last()) {
        (Some(&a), Some(&b)) => (t.ts_us[a], t.ts_us[b]),
        _ => (0, 0),
    };
    let edge = ((last - first) as f64 * EDGE) as i64;
    let mut head: Vec<f64> = usable.iter().filter(|&&i| t.ts_us[i] <= first + edge).map(|&i| t.raw[i]).collect();
    let mut tail: Vec<f64> = usable.iter().filter(|&&i| t.ts_us[i] >= last - edge).map(|&i| t.raw[i]).collect();
    let assessed = edge > 0 && head.len() >= MIN_EDGE_READINGS && tail.len() >= MIN_EDGE_READINGS;
    let moved = if assessed { Some(median(&mut tail) - median(&mut head)) } else { None };
    let beyond = moved.is_some_and(|m| m.abs() > gp.tolerance);
    let verdict = match moved {
        None => NOT_ASSESSED,
        Some(_) if beyond => MOVED,
        Some(_) => MOVED_WITHIN,
    };
    let mut rec = json!({
        "group": Value::Null,
        "members": [t.tag],
        "trusted": Value::Null,
        "attributed": false,
        "bias_end": Value::Null,
        "bias_end_std": Value::Null,
        "tolerance": gp.tolerance,
        "corrected": false,
        "verdict": verdict,
    });
    if let (Some(m), Some(obj)) = (moved, rec.as_object_mut()) {
        obj.insert("moved".into(), json!(m));
        obj.insert("moved_from".into(), json!(time_text(first)));
        obj.insert("moved_to".into(), json!(time_text(last)));
    }
    if let (Some(m), true) = (moved, beyond) {
        let units = w.settings.units.as_deref().unwrap_or("");
        w.report.notes.push(format!(
            "drift: {} moved {m:+.3} {units} over the window (median of the last eighth minus the first; \
             tolerance {:.3}) and has no redundant member: transmitter drift cannot be told from a process \
             change; check it against an independent measurement before recalibrating",
            t.tag, gp.tolerance
        ));
    }
    w.report.extra.insert("drift".into(), rec);
}
