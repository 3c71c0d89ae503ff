//! Built-in steps that need no model.
//!
//! - `quality`: a reading of bad quality, or a reading that is not a finite
//!   number, is rejected with fault `bad_quality` (its value becomes null;
//!   a later model step may replace it with an estimate). Uncertain readings
//!   are kept; the model steps give them a larger observation variance.
//!   Parameter: `uncertain: keep | reject` (default `keep`).
//! - `range`: a reading outside the instrument range [low, high] is rejected
//!   with fault `range`. The range is the rule's `range`, or the step's own
//!   `{low, high}`; the statistic recorded is the reading and the threshold the
//!   limit it crossed. Parameter `action: reject | flag` (default `reject`;
//!   `flag` keeps the reading and only sets the fault).

use std::sync::Arc;

use serde::Deserialize;

use super::{parse_params, Step, StepContext, StepError, TagWork};
use crate::series::{blocks, Fault, Quality, Status, TagTable};

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
enum Uncertain {
    #[default]
    Keep,
    Reject,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct QualityParams {
    #[serde(default)]
    uncertain: Uncertain,
}

/// The `quality` step.
#[derive(Debug, Clone)]
pub struct QualityStep {
    reject_uncertain: bool,
}

pub(crate) fn make_quality(params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
    let p: QualityParams = parse_params("quality", params)?;
    Ok(Arc::new(QualityStep { reject_uncertain: p.uncertain == Uncertain::Reject }))
}

impl Step for QualityStep {
    fn name(&self) -> &str {
        "quality"
    }

    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        for work in tags.iter_mut() {
            let t = &mut work.table;
            let bad = |t: &TagTable, i: usize| {
                t.quality[i] == Quality::Bad
                    || !t.raw[i].is_finite()
                    || (self.reject_uncertain && t.quality[i] == Quality::Uncertain)
            };
            // Most blocks hold no bad reading: they are scanned without
            // branches (vectorised) and skipped.
            for block in blocks(t.len()) {
                if !block.clone().fold(false, |any, i| any | bad(t, i)) {
                    continue;
                }
                for i in block {
                    if t.status[i] == Status::Ok && t.fault[i].is_none() && bad(t, i) {
                        t.decide(i, Status::Rejected, Some(Fault::BadQuality), ctx.index, f64::NAN, f64::NAN);
                        t.value[i] = f64::NAN;
                    }
                }
            }
        }
        Ok(())
    }
}

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
enum RangeAction {
    #[default]
    Reject,
    Flag,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RangeParams {
    low: Option<f64>,
    high: Option<f64>,
    #[serde(default)]
    action: RangeAction,
}

/// The `range` step.
#[derive(Debug, Clone)]
pub struct RangeStep {
    low: Option<f64>,
    high: Option<f64>,
    flag_only: bool,
}

pub(crate) fn make_range(params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
    let p: RangeParams = parse_params("range", params)?;
    if let (Some(lo), Some(hi)) = (p.low, p.high) {
        if lo >= hi || !lo.is_finite() || !hi.is_finite() {
            return Err(format!("step `range`: low ({lo}) must be below high ({hi}), both finite"));
        }
    }
    Ok(Arc::new(RangeStep { low: p.low, high: p.high, flag_only: p.action == RangeAction::Flag }))
}

impl Step for RangeStep {
    fn name(&self) -> &str {
        "range"
    }

    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        for work in tags.iter_mut() {
            let (lo, hi) = match (self.low, self.high, work.settings.range) {
                (Some(lo), Some(hi), _) => (lo, hi),
                (lo, hi, Some((rlo, rhi))) => (lo.unwrap_or(rlo), hi.unwrap_or(rhi)),
                (lo, hi, None) => (lo.unwrap_or(f64::NEG_INFINITY), hi.unwrap_or(f64::INFINITY)),
            };
            if lo == f64::NEG_INFINITY && hi == f64::INFINITY {
                return Err(StepError::Failed {
                    step: "range".into(),
                    message: format!(
                        "tag {}: no range given (set `range: [low, high]` on the rule or the step)",
                        work.table.tag
                    ),
                });
            }
            let t = &mut work.table;
            // A NaN reading compares false both ways, so it is never out of range.
            let out = |x: f64| (x < lo) | (x > hi);
            for block in blocks(t.len()) {
                if !t.raw[block.clone()].iter().fold(false, |any, &x| any | out(x)) {
                    continue;
                }
                for i in block {
                    if t.status[i] != Status::Ok || t.fault[i].is_some() || !t.raw[i].is_finite() {
                        continue;
                    }
                    let x = t.raw[i];
                    let limit = if x < lo {
                        lo
                    } else if x > hi {
                        hi
                    } else {
                        continue;
                    };
                    if self.flag_only {
                        t.decide(i, Status::Ok, Some(Fault::Range), ctx.index, x, limit);
                    } else {
                        t.decide(i, Status::Rejected, Some(Fault::Range), ctx.index, x, limit);
                        t.value[i] = f64::NAN;
                    }
                }
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plugin::{Registry, TagSettings};
    use crate::series::{ReadCounts, Sampling, TagSeries, TagTable};

    fn work(values: Vec<f64>, quality: Vec<Quality>, range: Option<(f64, f64)>) -> TagWork {
        let n = values.len();
        let s = TagSeries {
            tag: "FT-1".into(),
            ts_us: (0..n as i64).collect(),
            values,
            quality,
            counts: ReadCounts::default(),
        };
        TagWork {
            table: TagTable::from_series(&s, 1, Sampling::Regular),
            settings: Arc::new(TagSettings { range, ..Default::default() }),
            report: Default::default(),
            state: Default::default(),
        }
    }

    #[test]
    fn quality_rejects_bad_and_non_finite() {
        let reg = Registry::with_builtins();
        let step = reg.make("quality", &serde_json::Value::Null).unwrap();
        let mut w = [work(
            vec![1.0, f64::NAN, 3.0, 4.0],
            vec![Quality::Good, Quality::Good, Quality::Bad, Quality::Uncertain],
            None,
        )];
        step.apply(&mut w, &StepContext::new(0)).unwrap();
        let t = &w[0].table;
        assert_eq!(t.status, [Status::Ok, Status::Rejected, Status::Rejected, Status::Ok]);
        assert_eq!(t.fault[1], Some(Fault::BadQuality));
        assert!(t.value[2].is_nan());
        t.check().unwrap();
    }

    #[test]
    fn range_uses_rule_range_and_records_the_limit() {
        let reg = Registry::with_builtins();
        let step = reg.make("range", &serde_json::Value::Null).unwrap();
        let mut w = [work(vec![5.0, -1.0, 401.0], vec![Quality::Good; 3], Some((0.0, 400.0)))];
        step.apply(&mut w, &StepContext::new(1)).unwrap();
        let t = &w[0].table;
        assert_eq!(t.status, [Status::Ok, Status::Rejected, Status::Rejected]);
        assert_eq!((t.stat[1], t.threshold[1]), (-1.0, 0.0));
        assert_eq!((t.stat[2], t.threshold[2]), (401.0, 400.0));
        assert_eq!(t.decided_by[2], 1);
        // No range anywhere: the tag fails with a message naming it.
        let mut w = [work(vec![5.0], vec![Quality::Good], None)];
        assert!(step.apply(&mut w, &StepContext::new(0)).is_err());
        // Bad parameters are refused when the pipeline is checked.
        assert!(reg.make("range", &serde_json::json!({"low": 5, "high": 1})).is_err());
        assert!(reg.make("range", &serde_json::json!({"lo": 5})).is_err());
        assert!(reg.make("nope", &serde_json::Value::Null).err().unwrap().contains("known steps: quality, range"));
    }
}
