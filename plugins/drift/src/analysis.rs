//! From a group's tables to smoothed biases: alignment, start values,
//! attribution, step search, maximum likelihood, smoothing.

use tagwright::plugin::TagWork;
use tagwright::ssm::{filter, smooth, FilterOptions};

use crate::align::GroupData;
use crate::fit::{fit, select_biased, Fit};
use crate::jumps::{detect, Jump};
use crate::model::{moment_start, GroupModel, Segment, Structure, Variances};
use crate::params::GroupParams;
use crate::state::Carried;

/// How the group's biases can be told apart.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mode {
    /// A trusted member, or three or more members: each member's own bias
    /// against the process is estimated (the unbiased members are the reference).
    Attributed,
    /// Two members, none trusted: only their difference is known. Member 1
    /// carries the bias state, which is then the difference member 1 - member 0.
    Pair,
    /// Fewer than two members with readings: nothing to compare.
    Alone,
}

/// Vague prior standard deviation of a bias state, in tolerances.
pub const PRIOR_SD_TOLERANCES: f64 = 10.0;

/// Everything the decisions and the report need.
#[derive(Debug, Clone)]
pub struct Analysis {
    pub data: GroupData,
    pub mode: Mode,
    pub trusted: Option<usize>,
    pub structure: Structure,
    pub fit: Option<Fit>,
    /// Smoothed process and its variance per axis point (empty unless fitted).
    pub x: Vec<f64>,
    pub vx: Vec<f64>,
    /// Smoothed bias and variance per member and axis point; NaN for a member
    /// without a bias state.
    pub bias: Vec<Vec<f64>>,
    pub bias_var: Vec<Vec<f64>>,
    /// Steps found per member (axis index, size from the smoother, statistic).
    pub jumps: Vec<Vec<Jump>>,
    /// Whether a member's first bias segment started from the carried state.
    pub carried_used: Vec<bool>,
    /// Readings judged `step` or `drift` by an earlier step used as observations, per member.
    pub level_faults_used: Vec<usize>,
    /// Notes for the reviewer, per member.
    pub notes: Vec<Vec<String>>,
}

/// The vague prior of a bias state.
pub fn vague_prior(gp: &GroupParams) -> (f64, f64) {
    (0.0, (PRIOR_SD_TOLERANCES * gp.tolerance).powi(2))
}

/// How long a reference reading stands for the reference at a later axis
/// point, in nominal periods (members sampled at staggered times).
pub const REF_HOLD: f64 = 1.0;

/// Member-minus-reference differences of member `i`: the reference at t is
/// the precision-weighted mean of the members in `refs`, each taken at t or,
/// when it has no reading there, at its last reading within [`REF_HOLD`]
/// periods before t, less `offset[k]` (a known bias). Uncertain-quality
/// readings are left out. NaN where either side is missing.
pub fn difference(data: &GroupData, v: &Variances, i: usize, refs: &[usize], offset: &[f64]) -> Vec<f64> {
    let (n, m) = (data.len(), data.m);
    let mut d = vec![f64::NAN; n];
    // Last good reading of each member (value, time in periods).
    let mut last = vec![(f64::NAN, f64::NEG_INFINITY); m];
    for (t, dt) in d.iter_mut().enumerate() {
        for &k in refs {
            let yk = data.at(t, k);
            if yk.is_finite() && data.w[t * m + k] == 1.0 {
                last[k] = (yk, data.s[t]);
            }
        }
        let yi = data.at(t, i);
        if yi.is_nan() || data.w[t * m + i] != 1.0 {
            continue;
        }
        let (mut sw, mut swy) = (0.0, 0.0);
        for &k in refs {
            let (yk, sk) = last[k];
            if yk.is_finite() && data.s[t] - sk <= REF_HOLD {
                let wk = 1.0 / v.noise[k];
                sw += wk;
                swy += wk * (yk - offset[k]);
            }
        }
        if sw > 0.0 {
            *dt = yi - swy / sw;
        }
    }
    d
}

/// Runs the analysis of one group. `carried[j]` is member j's state from the
/// previous run when it refers to the same reference. Errors are messages
/// for the step's failure.
pub fn analyse(
    works: &[TagWork],
    gp: &GroupParams,
    trusted: Option<usize>,
    carried: &[Option<Carried>],
) -> Result<Analysis, String> {
    let mut data = GroupData::new(works);
    let (n, m) = (data.len(), data.m);
    let with_data = (0..m).filter(|&j| data.count(j) > 0).count();
    let q_bias = gp.q_bias(data.period_us);
    if m < 2 || with_data < 2 || n < 2 {
        return Ok(Analysis {
            mode: Mode::Alone,
            trusted,
            structure: Structure { segments: Vec::new(), q_bias },
            fit: None,
            x: Vec::new(),
            vx: Vec::new(),
            bias: vec![Vec::new(); m],
            bias_var: vec![Vec::new(); m],
            jumps: vec![Vec::new(); m],
            carried_used: vec![false; m],
            level_faults_used: vec![0; m],
            notes: vec![Vec::new(); m],
            data,
        });
    }
    let v0 = moment_start(&data);
    let vague = vague_prior(gp);
    let half_window = gp.step_window_us as f64 / data.period_us as f64;
    let mut notes = vec![Vec::new(); m];
    let priors = carried_priors(&data, &v0, gp, trusted, carried, q_bias, half_window, &mut notes);
    let prior = |j: usize| priors[j].unwrap_or(vague);

    // Who carries a bias state.
    let (mode, biased): (Mode, Vec<usize>) = match trusted {
        Some(k) => (Mode::Attributed, (0..m).filter(|&j| j != k).collect()),
        None if m == 2 => (Mode::Pair, vec![1]),
        None => {
            // The choice sees every member's level faults too (the same data
            // for every candidate), so a member whose drift an earlier step
            // already flagged is still recognised as the biased one.
            let mut all = data.clone();
            for j in 0..m {
                all.include_level_faults(j);
            }
            (Mode::Attributed, select_biased(&all, &v0, q_bias, &prior).0)
        }
    };
    let refs: Vec<usize> = (0..m).filter(|j| !biased.contains(j)).collect();
    // Readings an earlier step judged `step` or `drift` are the evidence of a
    // biased member's bias: they become its observations (their decisions stand).
    let mut level_faults_used = vec![0usize; m];
    for &j in &biased {
        level_faults_used[j] = data.include_level_faults(j);
        if level_faults_used[j] > 0 {
            notes[j].push(format!(
                "{} readings judged step or drift by an earlier step were used to estimate the bias \
                 (their decisions stand)",
                level_faults_used[j]
            ));
        }
    }
    let data = data;

    // Steps, and the segments of each biased member.
    let mut segments = Vec::new();
    let mut jumps = vec![Vec::new(); m];
    let mut carried_used = vec![false; m];
    for &i in &biased {
        let d = difference(&data, &v0, i, &refs, &vec![0.0; m]);
        let found = detect(&d, &data.s, half_window, gp.step_threshold, gp.step_min);
        let (mut p_mean, mut p_var) = prior(i);
        carried_used[i] = priors[i].is_some();
        // A carried bias that followed a step in an earlier run is still a step.
        let carried_step = carried_used[i] && carried[i].as_ref().is_some_and(|c| c.after_step);
        let mut from = 0;
        for (k, j) in found.iter().enumerate() {
            segments.push(Segment {
                member: i,
                from,
                to: j.index,
                prior_mean: p_mean,
                prior_var: p_var,
                after_step: k > 0 || carried_step,
            });
            from = j.index;
            (p_mean, p_var) = vague;
        }
        segments.push(Segment {
            member: i,
            from,
            to: n,
            prior_mean: p_mean,
            prior_var: p_var,
            after_step: !found.is_empty() || carried_step,
        });
        jumps[i] = found;
    }
    let structure = Structure { segments, q_bias };

    // Maximum likelihood, then the smoother at the estimates.
    let fitted = fit(&data, &structure, &v0);
    let model = GroupModel::new(&data, &structure, &fitted.variances);
    let obs = model.obs(&data);
    let filt = filter(&model.ss, &obs, &FilterOptions::default()).map_err(|e| format!("filter failed: {e}"))?;
    let sm = smooth(&model.ss, &obs, &filt);
    let ms = model.ss.state_dim();
    let var_of = |t: usize, i: usize| sm.cov[t * ms * ms + i * ms + i].max(0.0);
    let x: Vec<f64> = (0..n).map(|t| sm.state[t * ms]).collect();
    let vx: Vec<f64> = (0..n).map(|t| var_of(t, 0)).collect();
    let mut bias = vec![Vec::new(); m];
    let mut bias_var = vec![Vec::new(); m];
    for (s, seg) in structure.segments.iter().enumerate() {
        let j = seg.member;
        if bias[j].is_empty() {
            bias[j] = vec![f64::NAN; n];
            bias_var[j] = vec![f64::NAN; n];
        }
        for t in seg.from..seg.to {
            bias[j][t] = sm.state[t * ms + 1 + s];
            bias_var[j][t] = var_of(t, 1 + s);
        }
    }
    // Step sizes as the smoother sees them: the jump of the bias at the step.
    for (j, js) in jumps.iter_mut().enumerate() {
        for jump in js.iter_mut() {
            let t = jump.index;
            if t > 0 && !bias[j].is_empty() {
                jump.size = bias[j][t] - bias[j][t - 1];
            }
        }
    }
    Ok(Analysis {
        data,
        mode,
        trusted,
        structure,
        fit: Some(fitted),
        x,
        vx,
        bias,
        bias_var,
        jumps,
        carried_used,
        level_faults_used,
        notes,
    })
}

/// The priors of the members' bias states from the carried state, each
/// checked against the first readings of this window: the mean over the
/// first half-window of the member minus the other members' readings (each
/// less its own carried bias) must lie within max(step_min, 5 se) of the
/// carried bias, or the member starts afresh (it was recalibrated, replaced,
/// or the reference changed) with a note saying so.
#[allow(clippy::too_many_arguments)]
fn carried_priors(
    data: &GroupData,
    v0: &Variances,
    gp: &GroupParams,
    trusted: Option<usize>,
    carried: &[Option<Carried>],
    q_bias: f64,
    half_window: f64,
    notes: &mut [Vec<String>],
) -> Vec<Option<(f64, f64)>> {
    let m = data.m;
    let offset: Vec<f64> = carried.iter().map(|c| c.as_ref().map_or(0.0, |c| c.bias_end)).collect();
    let vague = vague_prior(gp);
    (0..m)
        .map(|j| {
            let c = carried[j].as_ref()?;
            let gap = ((data.times[0] - c.ts_us) as f64 / data.period_us as f64).max(0.0);
            let var = (c.bias_end_std.powi(2) + q_bias * gap).min(vague.1);
            let refs: Vec<usize> = match trusted {
                Some(k) if k != j => vec![k],
                _ => (0..m).filter(|&k| k != j).collect(),
            };
            let d = difference(data, v0, j, &refs, &offset);
            let early = d.iter().zip(&data.s).take_while(|(_, s)| **s < half_window).filter(|(x, _)| x.is_finite());
            let (sum, count) = early.fold((0.0, 0usize), |(s, c), (x, _)| (s + x, c + 1));
            if count < 3 {
                return Some((c.bias_end, var));
            }
            let mean = sum / count as f64;
            let ref_var = refs.iter().map(|&k| 1.0 / v0.noise[k]).sum::<f64>().recip();
            let se = ((v0.noise[j] + ref_var) / count as f64 + var).sqrt();
            if (mean - c.bias_end).abs() > gp.step_min.max(5.0 * se) {
                notes[j].push(format!(
                    "bias carried from the previous run ({:.4}) does not match the first readings of this window \
                     ({mean:.4}): started afresh (recalibrated or replaced?)",
                    c.bias_end
                ));
                return None;
            }
            Some((c.bias_end, var))
        })
        .collect()
}
