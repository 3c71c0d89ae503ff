//! The `fill` step: gaps filled and faulty readings replaced by the
//! smoothed process value, with its standard deviation.
//!
//! - Rows are inserted inside gaps at the tag's nominal period, counted on
//!   from the last sample before the gap (status `filled`, no fault). A gap
//!   of a regularly sampled tag is a spacing above 1.5 periods; on an
//!   exception-reported tag every unstored scan is inserted, and the
//!   estimate there uses the deadband (the value stayed within ±deadband of
//!   the last stored reading) for up to `max_quiet` after it.
//! - Readings an earlier step rejected get the estimate (status `replaced`,
//!   fault and statistic kept). Readings rejected as `noise` are used as
//!   observations with their variance multiplied by the noise factor the
//!   `faults` step measured.
//! - The estimate is the fixed-interval smoother's mean of the process value
//!   (Durbin & Koopman 2012, §4.4; Rauch, Tung & Striebel 1965) and `std` its
//!   standard deviation; every row of the tag gets `std`.
//! - A gap or a run of rejected readings longer than `max_gap` gets no
//!   estimate: inserted rows have a null value, rejected readings stay
//!   `rejected`.
//! - Filled values are never observations: no fit or test uses them.
//!
//! The model is the one an earlier step fitted (read back from the tag's
//! report), else the pipeline's or the default, fitted here.

use std::collections::BTreeMap;
use std::sync::Arc;

use serde::Deserialize;
use serde_json::json;
use tagwright::plugin::{parse_params, Registry, Step, StepContext, StepError, TagWork};
use tagwright::series::{Fault, Sampling, Status, TagTable};
use tagwright::tagmodel::{model_for, Fitted, TagObs};

/// Registers the step.
pub fn register(reg: &mut Registry) {
    reg.register("fill", make, "fill gaps and replace rejected readings with the smoothed value and its std");
}

/// Parameters of the `fill` step (YAML keys).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct FillParams {
    /// Longest gap (or run of rejected readings) given an estimate, as a
    /// duration. Default `30m`.
    pub max_gap: String,
    /// Replace rejected readings with the estimate. Default true.
    pub replace: bool,
    /// Longest quiet stretch of an exception-reported tag read as "within
    /// the deadband", as a duration. Default `1h`.
    pub max_quiet: String,
    /// Model parameters by name, used as given (no fit) when no earlier step
    /// fitted the tag.
    pub params: Option<BTreeMap<String, f64>>,
    /// Largest number of readings a fit here uses (see the `faults` step). Default 4096.
    pub fit_points: usize,
}

impl Default for FillParams {
    fn default() -> Self {
        FillParams { max_gap: "30m".into(), replace: true, max_quiet: "1h".into(), params: None, fit_points: 4096 }
    }
}

/// The step.
#[derive(Debug, Clone)]
pub struct FillStep {
    pub params: FillParams,
    pub max_gap_us: i64,
    pub max_quiet_us: i64,
}

fn make(params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
    let p: FillParams = parse_params("fill", params)?;
    let dur =
        |k: &str, v: &str| tagwright::pipeline::parse_duration_us(v).map_err(|e| format!("step `fill`: {k}: {e}"));
    let max_gap_us = dur("max_gap", &p.max_gap)?;
    let max_quiet_us = dur("max_quiet", &p.max_quiet)?;
    if max_gap_us <= 0 {
        return Err("step `fill`: max_gap must be longer than zero".into());
    }
    Ok(Arc::new(FillStep { params: p, max_gap_us, max_quiet_us }))
}

impl Step for FillStep {
    fn name(&self) -> &str {
        "fill"
    }

    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        for w in tags.iter_mut() {
            self.apply_one(w, ctx.index)
                .map_err(|m| StepError::Failed { step: "fill".into(), message: format!("tag {}: {m}", w.table.tag) })?;
        }
        Ok(())
    }
}

impl FillStep {
    fn apply_one(&self, work: &mut TagWork, step: u16) -> Result<(), String> {
        let period = work.table.period_us.max(1);
        let exception = matches!(work.table.sampling, Sampling::Exception { .. });
        // 1. Insert rows in the gaps.
        let mut inserts = Vec::new();
        {
            let ts = &work.table.ts_us;
            for w in ts.windows(2) {
                let gap = w[1] - w[0];
                let is_gap = if exception { gap > period } else { gap * 2 > period * 3 };
                if is_gap {
                    let mut t = w[0] + period;
                    while t < w[1] {
                        inserts.push(t);
                        t += period;
                    }
                }
            }
        }
        work.table.insert_rows(&inserts, step);
        let table = &work.table;
        let n = table.len();
        if n == 0 {
            return Ok(());
        }

        // 2. The model.
        let usable = |i: usize| {
            table.raw[i].is_finite()
                && match table.status[i] {
                    Status::Ok => true,
                    Status::Rejected => table.fault[i] == Some(Fault::Noise),
                    _ => false,
                }
        };
        // The usual tag, regularly sampled with no noisy reading, after the
        // fault tests left its readings as their last smoother pass had
        // them: that pass's signal is taken as it is (checked row by row
        // against what the observations would be, without building them).
        let noisy = table.fault.contains(&Some(Fault::Noise));
        let kept = match Fitted::from_report(&work.report) {
            // (Without noisy readings, the rows used are those of status ok.)
            Some(f) if !noisy && table.sampling == Sampling::Regular => {
                f.kept_signal_of_table(table, work.settings.uncertain_factor)
            }
            _ => None,
        };
        if let Some((y, mean, sd)) = kept {
            let mut obs = TagObs::default();
            obs.y = y;
            return self.write_estimates(work, &inserts, &obs, &mean, &sd);
        }
        let mut obs = TagObs::build(table, work.settings.uncertain_factor, usable, self.max_quiet_us);
        // (Most tags have no noisy reading: one scan of the faults first.)
        if noisy {
            for k in 0..obs.len() {
                if let Some(i) = obs.row(k) {
                    if table.fault[i] == Some(Fault::Noise) && table.stat[i].is_finite() {
                        let w = obs.w[k] * table.stat[i].max(1.0);
                        obs.set_base_weight(k, w);
                    }
                }
            }
        }
        let fitted = match Fitted::from_report(&work.report) {
            Some(f) => f,
            None => {
                let (spec, _) = model_for(&table.tag, &work.settings);
                if obs.observed() < 8 {
                    work.report.notes.push(format!("fill: only {} usable readings; nothing filled", obs.observed()));
                    return Ok(());
                }
                let f = match &self.params.params {
                    Some(given) => Fitted::given(&spec, given).map_err(|e| e.to_string())?,
                    None => Fitted::fit_at_most(&spec, &mut obs, None, self.params.fit_points.max(64))
                        .map_err(|e| e.to_string())?,
                };
                f.to_report(&mut work.report);
                f
            }
        };
        obs.set_noise(fitted.obs_noise());
        let (mean, sd) = fitted.smooth_signal(&obs).map_err(|e| e.to_string())?;
        self.write_estimates(work, &inserts, &obs, &mean, &sd)
    }

    /// Writes the smoothed `mean` and `sd` (per grid point of `obs`) into
    /// the rows: `std` everywhere, the value where a row was inserted or
    /// rejected; then the step's report.
    fn write_estimates(
        &self,
        work: &mut TagWork,
        inserts: &[i64],
        obs: &TagObs,
        mean: &[f64],
        sd: &[f64],
    ) -> Result<(), String> {
        let table = &work.table;
        let n = table.len();
        let period = table.period_us.max(1);
        let report = |work: &mut TagWork, filled: usize, replaced: usize, null_rows: usize| {
            work.report.extra.insert(
                "fill".into(),
                json!({"rows_inserted": inserts.len(), "filled": filled, "replaced": replaced,
                       "no_estimate": null_rows, "max_gap_s": self.max_gap_us as f64 / 1e6}),
            );
        };

        // On a grid without pseudo-rows (grid point k is row k, the usual
        // tag), every row gets its `std` in one copy, and only the rows
        // inserted or rejected are visited below.
        let open = |s: &Status| matches!(s, Status::Filled | Status::Rejected);
        let grid = obs.rows_are_grid() && obs.len() == n && sd.len() == n && table.std.len() == n;
        if grid && !table.status.iter().any(open) {
            // Nothing to fill.
            work.table.std.copy_from_slice(sd);
            report(work, 0, 0, 0);
            return Ok(());
        }

        // 3. The runs of rows without an observation (gaps and rejected
        // runs): (first row, end, length of the hole in time).
        let observed_rows = if grid { Vec::new() } else { observed_row(obs, n) };
        let is_observed = |i: usize| if grid { obs.y[i].is_finite() } else { observed_rows[i] };
        let mut holes: Vec<(usize, usize, i64)> = Vec::new();
        let mut i = 0;
        while i < n {
            if is_observed(i) {
                i += 1;
                continue;
            }
            let a = i;
            while i < n && !is_observed(i) {
                i += 1;
            }
            let before = if a > 0 { table.ts_us[a - 1] } else { table.ts_us[a] - period };
            let after = if i < n { table.ts_us[i] } else { table.ts_us[n - 1] + period };
            holes.push((a, i, after - before - period));
        }
        drop(observed_rows);

        // 4. Write the estimates: `visit(k, i)` for grid point k at row i.
        let t = &mut work.table;
        let (mut filled, mut replaced, mut null_rows) = (0usize, 0usize, 0usize);
        let mut hole = holes.iter().peekable();
        let mut visit = |t: &mut TagTable, k: usize, i: usize| {
            let (mean, sd) = (mean[k], sd[k]);
            t.std[i] = sd;
            if !open(&t.status[i]) {
                return;
            }
            // (Rows come in order: the holes before this one are passed.)
            while hole.next_if(|h| h.1 <= i).is_some() {}
            let hole_len = hole.peek().filter(|h| h.0 <= i).map_or(0, |h| h.2);
            let short = hole_len <= self.max_gap_us;
            match t.status[i] {
                Status::Filled => {
                    if short && mean.is_finite() {
                        t.value[i] = mean;
                        filled += 1;
                    } else {
                        t.value[i] = f64::NAN;
                        t.std[i] = f64::NAN;
                        null_rows += 1;
                    }
                }
                Status::Rejected
                    if self.params.replace && mean.is_finite() && (short || t.fault[i] == Some(Fault::Noise)) =>
                {
                    t.status[i] = Status::Replaced;
                    t.value[i] = mean;
                    replaced += 1;
                }
                Status::Rejected => t.std[i] = f64::NAN,
                _ => {}
            }
        };
        if grid {
            // Every row's `std` at once; then only the rows inserted or rejected.
            t.std.copy_from_slice(sd);
            for i in 0..n {
                if open(&t.status[i]) {
                    visit(t, i, i);
                }
            }
        } else {
            for k in 0..obs.len() {
                if let Some(i) = obs.row(k) {
                    visit(t, k, i);
                }
            }
        }
        report(work, filled, replaced, null_rows);
        Ok(())
    }
}

/// Whether each table row has an observation in `obs` (a finite reading).
fn observed_row(obs: &TagObs, n: usize) -> Vec<bool> {
    let mut v = vec![false; n];
    for (k, r) in obs.rows().enumerate() {
        if let Some(i) = r {
            v[i] = obs.y[k].is_finite();
        }
    }
    v
}

#[cfg(test)]
mod tests;
