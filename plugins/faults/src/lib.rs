//! The `faults` step: sensor faults of one tag found in the innovations of
//! its state-space model.
//!
//! For each tag the step takes the pipeline's model (or the default for the
//! tag's ISA-5.1 letter, [`tagwright::tagmodel::default_model`]), fits it by
//! maximum likelihood on the run's window, and examines the standardised
//! innovations e_t = v_t / sqrt(F_t):
//!
//! - **spike**: |e_t| above the spike bound (a two-sided normal test, i.e.
//!   chi-square with one degree of freedom on e_t^2); the reading is not used
//!   to update the filter ([`gate`]); a run of same-side rejections is
//!   re-examined as a level shift;
//! - **step**: a level shift found by that re-examination or by the
//!   smoother's auxiliary residual of the level disturbance (Harvey &
//!   Koopman 1992; de Jong & Penzer 1998); a shift that several other tags
//!   show at about the same time (the run's survey) is a process change and
//!   is not flagged;
//! - **stuck**: a run of identical readings whose probability under the
//!   model's predictive variance is negligible;
//! - **noise**: the windowed normalised innovation squared (each term capped
//!   at the spike bound squared, so one spike cannot raise it) above its
//!   chi-square bound.
//!
//! The fit is robust: readings judged faulty are treated as missing and the
//! model is fitted again, so a fault cannot inflate the noise estimate that
//! should have caught it. Bounds come from a false-alarm rate per tag per
//! shift ([`FaultParams::false_alarms`]) unless the pipeline sets them.
//! Details and references: `docs/faults.md`.

pub mod detect;
pub mod gate;

use std::collections::BTreeMap;
use std::sync::Arc;

use serde::Deserialize;
use tagwright::plugin::{parse_params, Registry, Step, StepContext, StepError, TagWork};
use tagwright::series::{Fault, Status};
use tagwright::ssm::ModelSpec;
use tagwright::tagmodel::{model_for, Fitted, TagObs, FIT_BLOCKS};

pub use detect::{Decision, Findings};

/// Registers the step.
pub fn register(reg: &mut Registry) {
    reg.register("faults", make, "flag spikes, steps, stuck and noisy readings from the model's innovations");
}

/// What to do with a reading judged faulty.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Action {
    /// Status `rejected`, value null (a later `fill` step gives an estimate).
    #[default]
    Reject,
    /// Keep the reading (status `ok`) and set the fault.
    Flag,
    /// For steps: value = raw minus the estimated step, status `replaced`.
    Correct,
}

/// Parameters of the `faults` step (YAML keys).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct FaultParams {
    /// Expected false alarms per tag per shift, per test (spike, step,
    /// stuck, noise); sets every bound not given. Default 0.05.
    pub false_alarms: f64,
    /// Length of the shift the rate is counted over, hours. Default 8.
    pub shift_hours: f64,
    /// Spike bound on |e| (standard deviations). Default from `false_alarms`.
    pub spike: Option<f64>,
    /// Step bound on the level auxiliary residual. Default from `step_false_alarms`.
    pub step: Option<f64>,
    /// Expected false step alarms per tag per shift (default 0.002). Lower
    /// than `false_alarms` because a step flag covers every reading after it:
    /// one false step costs hours of flagged rows, one false spike one row.
    pub step_false_alarms: f64,
    /// Shortest stuck run flagged, as a duration (`10m`); default none (the
    /// probability test alone decides).
    pub stuck: Option<String>,
    /// Readings at which a constant value is legitimate (a stopped pump's
    /// zero flow): runs at these values are never stuck.
    pub constant_ok: Vec<f64>,
    /// Window of the noise test, as a duration. Default `5m`.
    pub noise_window: String,
    /// Consecutive same-side spike rejections re-examined as a level shift. Default 3.
    pub shift_run: usize,
    /// Half-width of the window in which other tags' changes corroborate a
    /// process change, as a duration. Default `3m`.
    pub process_window: String,
    /// Other tags changing within the window that make a level shift a
    /// process change. Default 2.
    pub process_tags: usize,
    pub spike_action: Action,
    pub step_action: Action,
    pub stuck_action: Action,
    pub noise_action: Action,
    /// Model parameters by name (`sigma2.obs`, ...): used as given, no fit.
    pub params: Option<BTreeMap<String, f64>>,
    /// Fit rounds (fit, detect, refit without the faulty readings): default 2.
    pub rounds: usize,
    /// Largest number of readings the fit uses: a longer window is fitted on
    /// 8 evenly spread blocks of consecutive readings (default 4096).
    pub fit_points: usize,
    /// Smallest variance factor (windowed NIS per reading) flagged as
    /// noise, whatever the chi-square bound says. Default 3.
    pub noise_min_factor: f64,
}

impl Default for FaultParams {
    fn default() -> Self {
        FaultParams {
            false_alarms: 0.05,
            shift_hours: 8.0,
            spike: None,
            step: None,
            step_false_alarms: 0.002,
            stuck: None,
            constant_ok: Vec::new(),
            noise_window: "5m".into(),
            shift_run: 3,
            process_window: "3m".into(),
            process_tags: 2,
            spike_action: Action::Reject,
            step_action: Action::Flag,
            stuck_action: Action::Reject,
            noise_action: Action::Reject,
            params: None,
            rounds: 2,
            noise_min_factor: 3.0,
            fit_points: 4096,
        }
    }
}

/// The step, with durations parsed.
#[derive(Debug, Clone)]
pub struct FaultsStep {
    pub params: FaultParams,
    pub stuck_min_us: i64,
    pub noise_window_us: i64,
    pub process_window_us: i64,
}

fn duration(key: &str, text: &str) -> Result<i64, String> {
    tagwright::pipeline::parse_duration_us(text).map_err(|e| format!("step `faults`: {key}: {e}"))
}

fn make(params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
    let p: FaultParams = parse_params("faults", params)?;
    Ok(Arc::new(FaultsStep::new(p)?))
}

impl FaultsStep {
    /// Validates the parameters.
    pub fn new(p: FaultParams) -> Result<Self, String> {
        let bad = |m: String| Err(format!("step `faults`: {m}"));
        if !(p.false_alarms > 0.0 && p.false_alarms.is_finite()) {
            return bad(format!("false_alarms must be a positive number, got {}", p.false_alarms));
        }
        if !(p.step_false_alarms > 0.0 && p.step_false_alarms.is_finite()) {
            return bad(format!("step_false_alarms must be a positive number, got {}", p.step_false_alarms));
        }
        if !(p.shift_hours > 0.0 && p.shift_hours <= 168.0) {
            return bad(format!("shift_hours must be in (0, 168], got {}", p.shift_hours));
        }
        for (k, v) in [("spike", p.spike), ("step", p.step)] {
            if let Some(v) = v {
                if !(v > 0.0 && v.is_finite()) {
                    return bad(format!("{k} must be a positive number of standard deviations, got {v}"));
                }
            }
        }
        if p.fit_points < 64 {
            return bad(format!("fit_points must be at least 64, got {}", p.fit_points));
        }
        if p.shift_run == 0 {
            return bad("shift_run must be at least 1".into());
        }
        if p.rounds == 0 || p.rounds > 5 {
            return bad(format!("rounds must be 1 to 5, got {}", p.rounds));
        }
        if p.step_action == Action::Correct && p.spike_action == Action::Correct {
            return bad("spike_action cannot be `correct` (only step_action can)".into());
        }
        for (k, a) in
            [("spike_action", p.spike_action), ("stuck_action", p.stuck_action), ("noise_action", p.noise_action)]
        {
            if a == Action::Correct {
                return bad(format!("{k} cannot be `correct` (use reject and a `fill` step)"));
            }
        }
        let stuck_min_us = match &p.stuck {
            Some(s) => duration("stuck", s)?,
            None => 0,
        };
        let noise_window_us = duration("noise_window", &p.noise_window)?;
        let process_window_us = duration("process_window", &p.process_window)?;
        if !(p.noise_min_factor >= 1.0 && p.noise_min_factor.is_finite()) {
            return bad(format!("noise_min_factor must be a number >= 1, got {}", p.noise_min_factor));
        }
        if noise_window_us <= 0 {
            return bad("noise_window must be longer than zero".into());
        }
        if let Some(given) = &p.params {
            if given.values().any(|v| !v.is_finite()) {
                return bad("params: every model parameter must be a finite number".into());
            }
        }
        Ok(FaultsStep { params: p, stuck_min_us, noise_window_us, process_window_us })
    }
}

impl Step for FaultsStep {
    fn name(&self) -> &str {
        "faults"
    }

    fn uses_survey(&self) -> bool {
        true
    }

    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        for work in tags.iter_mut() {
            self.apply_one(work, ctx)?;
        }
        Ok(())
    }
}

impl FaultsStep {
    fn fail(&self, tag: &str, message: impl std::fmt::Display) -> StepError {
        StepError::Failed { step: "faults".into(), message: format!("tag {tag}: {message}") }
    }

    fn apply_one(&self, work: &mut TagWork, ctx: &StepContext) -> Result<(), StepError> {
        let tag = work.table.tag.clone();
        let (spec, reason): (ModelSpec, String) = model_for(&tag, &work.settings);
        let table = &work.table;
        let usable: Vec<bool> = (0..table.len())
            .map(|i| table.status[i] == Status::Ok && table.fault[i].is_none() && table.raw[i].is_finite())
            .collect();
        let n_usable = usable.iter().filter(|&&u| u).count();
        if n_usable < 8 {
            work.report
                .notes
                .push(format!("faults: only {n_usable} usable readings; no model fitted and no fault test run"));
            return Ok(());
        }
        let mut base = TagObs::build(table, work.settings.uncertain_factor, |i| usable[i], 0);
        let cfg = detect::Config::new(&self.params, table.period_us, self, base.observed());
        let mut excluded = vec![false; base.len()];
        let mut fitted: Option<Fitted> = None;
        let mut findings = Findings::default();
        let mut rounds_run = 0;
        let rounds = if self.params.params.is_some() { 1 } else { self.params.rounds };
        for round in 0..rounds {
            // The readings this round's fit sees (all, or a subsample).
            let sample;
            let f = match &self.params.params {
                Some(given) => {
                    sample = None;
                    Fitted::given(&spec, given).map_err(|e| self.fail(&tag, e))?
                }
                None => {
                    let mut obs = base.clone();
                    for (k, &x) in excluded.iter().enumerate() {
                        if x {
                            obs.drop_point(k);
                        }
                    }
                    sample = obs.sample_ranges(self.params.fit_points, FIT_BLOCKS);
                    // Start from this round's predecessor, else from the
                    // parameters the last run carried over for this model.
                    let start = fitted.as_ref().map(|f: &Fitted| f.params.clone()).or_else(|| carried(work, &spec));
                    Fitted::fit_at_most(&spec, &mut obs, start, self.params.fit_points)
                        .map_err(|e| self.fail(&tag, e))?
                }
            };
            // Detection runs on all usable readings (the excluded ones are
            // judged again, against the refitted model).
            // (The last round may take `base` itself.)
            let mut all = if round + 1 == rounds { std::mem::take(&mut base) } else { base.clone() };
            all.set_noise(f.obs_noise());
            findings = detect::find(&f, &all, table, &cfg, ctx.survey, &tag).map_err(|e| self.fail(&tag, e))?;
            fitted = Some(f);
            rounds_run = round + 1;
            let before = excluded.iter().filter(|&&x| x).count();
            let next = findings.excluded(all.len());
            // The next fit would see the same readings when no reading of
            // this fit's sample changed its verdict: it would give the same
            // model, so the rounds end (a fault outside the sample cannot
            // have inflated the estimates).
            let changed = |k: usize| next.get(k) != excluded.get(k);
            let same_sample = match &sample {
                Some(ranges) => !ranges.iter().flat_map(|r| r.clone()).any(changed),
                None => !(0..next.len()).any(changed),
            };
            excluded = next;
            if same_sample || (round > 0 && excluded.iter().filter(|&&x| x).count() == before) {
                break;
            }
        }
        let Some(fitted) = fitted else { return Ok(()) };
        fitted.to_report(&mut work.report);
        work.state
            .insert("faults".into(), serde_json::json!({"model": fitted.spec.to_string(), "params": fitted.params}));
        work.report.extra.insert("model_choice".into(), serde_json::json!(reason));
        if self.params.params.is_none() {
            work.report.extra.insert("fit_rounds".into(), serde_json::json!(rounds_run));
        }
        if !findings.process_changes.is_empty() {
            work.report.extra.insert("process_changes".into(), serde_json::json!(findings.process_changes));
        }
        apply_decisions(work, &findings, &self.params, ctx.index);
        Ok(())
    }
}

/// Parameters a previous run carried over (`state.faults`) for this model.
fn carried(work: &TagWork, spec: &ModelSpec) -> Option<Vec<f64>> {
    let st = work.state.get("faults")?;
    if st.get("model")?.as_str()? != spec.to_string() {
        return None;
    }
    let params: Vec<f64> = serde_json::from_value(st.get("params")?.clone()).ok()?;
    (params.len() == spec.param_names().len() && spec.validate(&params).is_ok()).then_some(params)
}

/// Writes the findings into the table.
fn apply_decisions(work: &mut TagWork, f: &Findings, p: &FaultParams, step: u16) {
    let t = &mut work.table;
    for d in &f.decisions {
        let i = d.row;
        if t.status[i] != Status::Ok || t.fault[i].is_some() {
            continue;
        }
        let action = match d.fault {
            Fault::Spike => p.spike_action,
            Fault::Step => p.step_action,
            Fault::Stuck => p.stuck_action,
            Fault::Noise => p.noise_action,
            _ => Action::Flag,
        };
        match action {
            Action::Flag => t.decide(i, Status::Ok, Some(d.fault), step, d.stat, d.threshold),
            Action::Reject => {
                t.decide(i, Status::Rejected, Some(d.fault), step, d.stat, d.threshold);
                t.value[i] = f64::NAN;
            }
            Action::Correct => {
                t.decide(i, Status::Replaced, Some(d.fault), step, d.stat, d.threshold);
                t.value[i] = t.raw[i] - d.size;
                t.std[i] = d.size_sd;
            }
        }
    }
}

#[cfg(test)]
mod tests;
