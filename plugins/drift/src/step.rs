//! The `drift` step: decisions on the members' rows, the provenance record
//! and the carried state.

use std::sync::Arc;

use serde_json::{json, Value};
use tagwright::engine::time_text;
use tagwright::plugin::{Step, StepContext, StepError, TagWork};
use tagwright::series::{Fault, Quality, Status};

use crate::analysis::{analyse, Analysis, Mode};
use crate::params::{DriftParams, GroupParams};
use crate::state;

/// The `drift` step (see the crate documentation and `docs/drift.md`).
#[derive(Debug, Clone)]
pub struct DriftStep {
    params: DriftParams,
}

impl DriftStep {
    /// A step with checked parameters.
    pub fn new(params: DriftParams) -> Self {
        DriftStep { params }
    }
}

/// The registry's factory.
pub fn make(params: &Value) -> Result<Arc<dyn Step>, String> {
    Ok(Arc::new(DriftStep::new(DriftParams::from_yaml(params)?)))
}

fn fail(works: &[TagWork], message: impl std::fmt::Display) -> StepError {
    let tags: Vec<&str> = works.iter().map(|w| w.table.tag.as_str()).collect();
    StepError::Failed { step: "drift".into(), message: format!("tag {}: {message}", tags.join(", ")) }
}

fn num(v: f64) -> Value {
    serde_json::Number::from_f64(v).map_or(Value::Null, Value::Number)
}

/// Above this standard deviation (in tolerances) the bias at the end of the
/// window is too uncertain to call the member within tolerance: with the
/// default drift rate (tolerance / 4 per hour) that is about an hour without
/// a usable reading.
const UNSURE_OF_TOLERANCE: f64 = 0.25;

/// What happened to one member's rows.
#[derive(Debug, Clone, Copy, Default)]
struct Tally {
    flagged: usize,
    corrected: usize,
    filled: usize,
    /// Fault of the last row beyond the tolerance.
    last: Option<Fault>,
}

impl Step for DriftStep {
    fn name(&self) -> &str {
        "drift"
    }

    fn couples_tags(&self) -> bool {
        true
    }

    fn apply(&self, works: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        if works.is_empty() {
            return Ok(());
        }
        let Some(group) = works[0].settings.group.clone() else {
            // No redundant member: report the movement, change nothing.
            for w in works.iter_mut() {
                let gp = self.params.resolve(w.settings.range).map_err(|e| fail(std::slice::from_ref(w), e))?;
                crate::lone::report(w, &gp);
            }
            return Ok(());
        };
        let range = works.iter().find_map(|w| w.settings.range);
        let gp = self.params.resolve(range).map_err(|e| fail(works, format!("group {group}: {e}")))?;
        let trusted_name = works[0].settings.group_trusted.clone();
        let trusted = trusted_name.as_ref().and_then(|t| works.iter().position(|w| &w.table.tag == t));
        let m = works.len();
        // What a member's carried bias is measured against.
        let references: Vec<String> = (0..m)
            .map(|j| if trusted.is_none() && m == 2 { works[1 - j].table.tag.clone() } else { "process".into() })
            .collect();
        let carried: Vec<_> = (0..m).map(|j| state::read(&works[j].state, &references[j])).collect();
        let an = analyse(works, &gp, trusted, &carried).map_err(|e| fail(works, format!("group {group}: {e}")))?;
        let tallies: Vec<Tally> = (0..m).map(|j| decide_member(&an, &gp, j, &mut works[j], ctx)).collect();
        let members: Vec<String> = {
            let mut v: Vec<String> = works.iter().map(|w| w.table.tag.clone()).collect();
            v.sort();
            v
        };
        let end_ts = an.data.times.last().copied().unwrap_or(0);
        for j in 0..m {
            let reference = &references[j];
            let record = record(&an, &gp, j, &group, &members, trusted_name.as_deref(), &tallies[j], works);
            let work = &mut works[j];
            // Nothing analysed (fewer than two members with readings): the
            // carried state stays as it was for the next run.
            if an.mode != Mode::Alone {
                let biased_end = end_bias(&an, j);
                let bias_member = if an.mode == Mode::Pair { 1 } else { j };
                let after_step = biased_end.is_some()
                    && an
                        .structure
                        .segments
                        .iter()
                        .rev()
                        .find(|s| s.member == bias_member)
                        .is_some_and(|s| s.after_step);
                work.state.insert(state::KEY.into(), state::value(reference, biased_end, after_step, end_ts));
            }
            report(&an, &gp, j, work, record, &tallies[j]);
        }
        Ok(())
    }
}

/// Bias (or pair difference) of member j at the end of the window, with its std.
fn end_bias(an: &Analysis, j: usize) -> Option<(f64, f64)> {
    let b = an.bias.get(j)?;
    let t = b.len().checked_sub(1)?;
    let (v, var) = (b[t], an.bias_var[j][t]);
    v.is_finite().then(|| (v, var.max(0.0).sqrt()))
}

/// Flags, corrects and fills the rows of member j.
fn decide_member(an: &Analysis, gp: &GroupParams, j: usize, work: &mut TagWork, ctx: &StepContext) -> Tally {
    let mut tally = Tally::default();
    let data = &an.data;
    let m = data.m;
    let Some(fit) = &an.fit else { return tally };
    // The bias series that decides this member's rows, and its sign.
    let (series, sign, bias_member) = match an.mode {
        Mode::Attributed if !an.bias[j].is_empty() => (Some(&an.bias[j]), 1.0, j),
        Mode::Pair => (an.bias.get(1).filter(|b| !b.is_empty()), if j == 1 { 1.0 } else { -1.0 }, 1),
        _ => (None, 1.0, j),
    };
    let noise = fit.variances.noise[j];
    let t_rows = &data.rows[j];
    let table = &mut work.table;
    for (r, &t) in t_rows.iter().enumerate() {
        match table.status[r] {
            Status::Ok if table.fault[r].is_none() => {
                let Some(b) = series else { continue };
                let bt = sign * b[t];
                let readable = table.raw[r].is_finite() && table.quality[r] != Quality::Bad;
                if bt.is_nan() || bt.abs() <= gp.tolerance || !readable {
                    continue;
                }
                let after_step =
                    an.structure.segment_at(bias_member, t).is_some_and(|s| an.structure.segments[s].after_step);
                let fault = if after_step { Fault::Step } else { Fault::Drift };
                tally.last = Some(fault);
                if an.mode == Mode::Attributed && gp.correct {
                    let w = data.w[t * m + j];
                    table.decide(r, Status::Replaced, Some(fault), ctx.index, bt, gp.tolerance);
                    table.value[r] = table.raw[r] - bt;
                    table.std[r] = (noise * w + an.bias_var[j][t]).max(0.0).sqrt();
                    tally.corrected += 1;
                } else {
                    table.decide(r, Status::Ok, Some(fault), ctx.index, bt, gp.tolerance);
                    tally.flagged += 1;
                }
            }
            Status::Rejected if an.mode == Mode::Attributed && gp.fill_rejected => {
                // Another member read the process at this time.
                let others = (0..m).any(|k| k != j && data.at(t, k).is_finite());
                if others && an.x[t].is_finite() {
                    table.status[r] = Status::Replaced;
                    table.value[r] = an.x[t];
                    table.std[r] = an.vx[t].max(0.0).sqrt();
                    tally.filled += 1;
                }
            }
            _ => {}
        }
    }
    tally
}

/// The `extra["drift"]` record of member j.
#[allow(clippy::too_many_arguments)]
fn record(
    an: &Analysis,
    gp: &GroupParams,
    j: usize,
    group: &str,
    members: &[String],
    trusted: Option<&str>,
    tally: &Tally,
    works: &[TagWork],
) -> Value {
    let is_trusted = an.trusted == Some(j);
    let has_data = an.data.count(j) > 0;
    // The member's own bias can be told from the process (not so for the
    // trusted member itself: it is the reference, and its drift is unseen).
    let attributed = an.mode == Mode::Attributed && !is_trusted;
    // The bias (pair: the difference) at the end, and whether it ends beyond the tolerance.
    let end = end_bias(an, j);
    let decisive = if an.mode == Mode::Pair { end_bias(an, 1) } else { end };
    let end_beyond = decisive.is_some_and(|(b, _)| b.abs() > gp.tolerance);
    let end_unsure = decisive.is_some_and(|(_, s)| s > UNSURE_OF_TOLERANCE * gp.tolerance);
    let bias_member = if an.mode == Mode::Pair { 1 } else { j };
    let end_fault = match an.structure.segments.iter().rev().find(|s| s.member == bias_member) {
        Some(s) if s.after_step => Fault::Step,
        _ => Fault::Drift,
    };
    let label = |f: Fault| if f == Fault::Step { "step" } else { "drifting" };
    let verdict = match an.mode {
        Mode::Alone => "not assessed (no redundant member with readings)",
        _ if is_trusted => "reference",
        _ if !has_data => "not assessed (no usable readings)",
        Mode::Pair if end_beyond || tally.last.is_some() => "diverging pair (cannot attribute)",
        Mode::Attributed if end_beyond => label(end_fault),
        Mode::Attributed if tally.last.is_some() => tally.last.map_or("drifting", label),
        _ if end_unsure => "not assessed (too few usable readings at the end of the window)",
        _ => "within tolerance",
    };
    let (bias_end, bias_end_std) = match an.mode {
        Mode::Attributed => match end {
            Some((b, s)) => (num(b), num(s)),
            // Held unbiased: the trusted member, or a member of the healthy majority.
            None => (num(0.0), num(0.0)),
        },
        _ => (Value::Null, Value::Null),
    };
    let mut rec = json!({
        "group": group,
        "members": members,
        "trusted": trusted,
        "attributed": attributed,
        "bias_end": bias_end,
        "bias_end_std": bias_end_std,
        "tolerance": gp.tolerance,
        "verdict": verdict,
        "corrected": tally.corrected > 0,
    });
    let Some(obj) = rec.as_object_mut() else { return rec };
    obj.insert("bias_state".into(), json!(attributed && end.is_some()));
    if an.mode == Mode::Pair {
        let (d, s) = end_bias(an, 1).map_or((f64::NAN, f64::NAN), |(d, s)| if j == 1 { (d, s) } else { (-d, s) });
        obj.insert("difference_end".into(), num(d));
        obj.insert("difference_end_std".into(), num(s));
        obj.insert("difference_to".into(), json!(works[1 - j].table.tag));
    }
    let jumps: Vec<Value> = an.jumps[j]
        .iter()
        .filter_map(|jp| {
            let ts = an.data.times.get(jp.index)?;
            Some(json!({"at": time_text(*ts), "size": num(jp.size), "statistic": num(jp.z)}))
        })
        .collect();
    obj.insert("steps".into(), json!(jumps));
    obj.insert(
        "rows".into(),
        json!({"flagged": tally.flagged, "corrected": tally.corrected, "filled_from_group": tally.filled}),
    );
    obj.insert("carried".into(), json!(an.carried_used[j]));
    obj.insert("level_faults_used".into(), json!(an.level_faults_used[j]));
    if let Some(fit) = &an.fit {
        obj.insert(
            "params".into(),
            json!({
                "sigma2.noise": num(fit.variances.noise[j]),
                "sigma2.process": num(fit.variances.process),
                "q.bias": num(an.structure.q_bias),
                "drift_rate": gp.drift_rate,
                "loglik": num(fit.loglik),
                "converged": fit.converged,
            }),
        );
    }
    rec
}

/// Writes the record, the model and a note into the member's report.
fn report(an: &Analysis, gp: &GroupParams, j: usize, work: &mut TagWork, record: Value, tally: &Tally) {
    let units = work.settings.units.clone().unwrap_or_default();
    if let (Some(fit), None) = (&an.fit, &work.report.model) {
        work.report.model = Some("drift: x random walk + bias random walks (redundant group)".into());
        work.report.params.insert("sigma2.noise".into(), fit.variances.noise[j]);
        work.report.params.insert("sigma2.process".into(), fit.variances.process);
        work.report.params.insert("q.bias".into(), an.structure.q_bias);
        work.report.loglik = Some(fit.loglik);
    }
    let tag = work.table.tag.clone();
    let beyond = |b: Option<(f64, f64)>| b.is_some_and(|(b, _)| b.abs() > gp.tolerance);
    let flagged = tally.last.is_some() || beyond(end_bias(an, if an.mode == Mode::Pair { 1 } else { j }));
    match (an.mode, flagged, end_bias(an, j)) {
        (Mode::Attributed, true, Some((b, s))) => work.report.notes.push(format!(
            "drift: {tag} reads {b:+.3} {units} (std {s:.3}) off the process at the end of the window \
             (tolerance {:.3}): recalibrate by {:+.3} {units}",
            gp.tolerance, -b
        )),
        (Mode::Pair, true, _) => {
            let (d, _) = end_bias(an, 1).unwrap_or((f64::NAN, f64::NAN));
            work.report.notes.push(format!(
                "drift: the pair differs by {d:+.3} {units} at the end of the window (tolerance {:.3}); which \
                 transmitter is off cannot be told without a trusted member or a third transmitter",
                gp.tolerance
            ));
        }
        _ => {}
    }
    work.report.notes.extend(an.notes[j].iter().map(|n| format!("drift: {n}")));
    work.report.extra.insert("drift".into(), record);
}
