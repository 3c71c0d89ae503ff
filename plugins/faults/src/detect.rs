//! The four tests, run on one tag with a fitted model. See the crate
//! documentation for the overview and `docs/faults.md` for the reference.

// The tests walk parallel arrays (grid points, rows, verdicts) by index.
#![allow(clippy::needless_range_loop)]

use serde_json::json;
use tagwright::plugin::Survey;
use tagwright::series::{Fault, Sampling, TagTable};
use tagwright::ssm::{StateSpace, StepRule};
use tagwright::stats::{chi2_upper_quantile, normal_quantile, per_test_alpha};
use tagwright::tagmodel::{Fitted, TagObs};

use crate::gate::{self, GateOptions};
use crate::{FaultParams, FaultsStep};

/// The bounds of one tag's tests.
#[derive(Debug, Clone)]
pub struct Config {
    pub spike: f64,
    pub step: f64,
    /// Probability below which a run of identical readings is stuck.
    pub stuck_alpha: f64,
    pub stuck_min_us: i64,
    pub constant_ok: Vec<f64>,
    /// Noise window in readings.
    pub noise_w: usize,
    pub noise_alpha: f64,
    pub noise_min_factor: f64,
    pub shift_run: usize,
    pub process_window_us: i64,
    pub process_tags: usize,
}

impl Config {
    /// Bounds for a tag sampled every `period_us`, from the false-alarm rate
    /// per tag per shift unless the pipeline gives them.
    pub fn new(p: &FaultParams, period_us: i64, step: &FaultsStep, _n_obs: usize) -> Config {
        let per_shift = (p.shift_hours * 3600e6 / period_us.max(1) as f64).max(1.0);
        let alpha = per_test_alpha(p.false_alarms, per_shift);
        let z = normal_quantile(1.0 - alpha / 2.0);
        let noise_w = ((step.noise_window_us / period_us.max(1)) as usize).max(10);
        Config {
            spike: p.spike.unwrap_or(z),
            step: p.step.unwrap_or_else(|| normal_quantile(1.0 - per_test_alpha(p.step_false_alarms, per_shift) / 2.0)),
            stuck_alpha: alpha,
            stuck_min_us: step.stuck_min_us,
            constant_ok: p.constant_ok.clone(),
            noise_w,
            noise_alpha: per_test_alpha(p.false_alarms, per_shift / noise_w as f64),
            noise_min_factor: p.noise_min_factor,
            shift_run: p.shift_run,
            process_window_us: step.process_window_us,
            process_tags: p.process_tags,
        }
    }
}

/// One row's verdict.
#[derive(Debug, Clone, PartialEq)]
pub struct Decision {
    /// Table row.
    pub row: usize,
    pub fault: Fault,
    /// Test statistic and the bound it crossed (recorded in provenance).
    pub stat: f64,
    pub threshold: f64,
    /// Estimated step size (steps only) and its standard deviation.
    pub size: f64,
    pub size_sd: f64,
}

/// Everything the tests found on one tag.
#[derive(Debug, Clone, Default)]
pub struct Findings {
    pub decisions: Vec<Decision>,
    /// Grid points to leave out of the next fit.
    pub exclude: Vec<usize>,
    /// Level shifts judged to be process changes (for provenance).
    pub process_changes: Vec<serde_json::Value>,
}

impl Findings {
    /// The exclusion mask over `n` grid points.
    pub fn excluded(&self, n: usize) -> Vec<bool> {
        let mut m = vec![false; n];
        for &k in &self.exclude {
            if k < n {
                m[k] = true;
            }
        }
        m
    }
}

/// Index of the level state (random walk or the trend's level), if any.
pub fn level_index(model: &StateSpace) -> Option<usize> {
    model
        .blocks
        .iter()
        .find(|b| matches!(b.rule, StepRule::RandomWalk { .. } | StepRule::Trend { .. }))
        .or_else(|| model.blocks.iter().find(|b| matches!(b.rule, StepRule::Constant)))
        .map(|b| b.offset)
}

/// Lower bound of the one-step innovation variance: h + z'RQR'z.
fn f_lower_bound(model: &StateSpace) -> f64 {
    let rqr = model.rqr();
    let m = model.state_dim();
    let mut s = model.h[0];
    for i in 0..m {
        for j in 0..m {
            s += model.z[(0, i)] * rqr[(i, j)] * model.z[(0, j)];
        }
    }
    s
}

/// Runs the tests. `obs` holds every usable reading (and pseudo-observations
/// of an exception-reported tag) with the model's noise folded in.
pub fn find(
    f: &Fitted,
    obs: &TagObs,
    table: &TagTable,
    cfg: &Config,
    survey: Option<&Survey>,
    tag: &str,
) -> Result<Findings, String> {
    if f.model.state_dim() > gate::MAX_STATES {
        return Err(format!(
            "model {} has {} states; the fault tests support at most {}",
            f.spec,
            f.model.state_dim(),
            gate::MAX_STATES
        ));
    }
    let n = obs.len();
    let mut out = Findings::default();
    // Grid point of each table row (the row itself on a grid without
    // pseudo-rows).
    let mut k_of_row = Vec::new();
    if !obs.rows_are_grid() {
        k_of_row = vec![usize::MAX; table.len()];
        for (k, r) in obs.rows().enumerate() {
            if let Some(r) = r {
                k_of_row[r] = k;
            }
        }
    }
    let k_of = |row: usize| -> Option<usize> {
        if k_of_row.is_empty() {
            (row < n).then_some(row)
        } else {
            k_of_row.get(row).copied().filter(|&k| k != usize::MAX)
        }
    };
    let mut fault_at: Vec<Option<Fault>> = vec![None; n];

    // 1. Stuck: runs of identical readings on a regularly sampled tag.
    // (A copy only when a stuck run leaves readings out.)
    let mut clean = std::borrow::Cow::Borrowed(obs);
    if table.sampling == Sampling::Regular {
        for d in stuck_runs(obs, table, cfg, f_lower_bound(&f.model)) {
            if let Some(k) = k_of(d.row) {
                fault_at[k] = Some(Fault::Stuck);
                clean.to_mut().drop_point(k);
                out.exclude.push(k);
            }
            out.decisions.push(d);
        }
    }

    // 2. The online pass: spikes and re-examined level shifts.
    let level = level_index(&f.model);
    let gopts = GateOptions { spike: cfg.spike, shift_run: cfg.shift_run, level, min_warm: 3 };
    let can_gate = |k: usize| obs.row(k).is_some();
    // On most tags the gate rejects nothing: its pass is then the plain
    // filter's over `clean`, whose innovations are computed first, and a
    // smoother pass below that leaves nothing out reuses that filter. Only
    // when a reading would be rejected does the gate run its own pass.
    let mut plain = f.innovations(&clean, gopts.min_warm).map_err(|e| e.to_string())?;
    let (e, v) = (std::mem::take(&mut plain.e), std::mem::take(&mut plain.v));
    let g = gate::GateOutput::from_plain(e, v, &gopts, &can_gate)
        .unwrap_or_else(|| gate::run(&f.model, &clean, &gopts, &can_gate));

    // Process transients: where this tag changed abruptly together with the
    // plant (its redundant group, or enough other tags), large innovations
    // are the process moving, not a spike or noise.
    let transients: Vec<(i64, i64)> = survey
        .map(|s| {
            s.times_of(tag)
                .into_iter()
                .filter(|&c| s.process_change(tag, c, cfg.process_window_us, cfg.process_tags).is_some())
                .map(|c| (c - cfg.process_window_us, c + cfg.process_window_us))
                .collect()
        })
        .unwrap_or_default();
    let in_transient = |k: usize| transients.iter().any(|&(a, b)| obs.ts_us[k] >= a && obs.ts_us[k] <= b);
    // Noise is not judged near a plant-wide change even when this tag's own
    // response is slow: its innovations there are the process settling.
    let near_plant_change = |k: usize| {
        survey.is_some_and(|s| {
            let t = obs.ts_us[k];
            s.others_within(tag, t - cfg.process_window_us, t + cfg.process_window_us).len() > cfg.process_tags
        })
    };
    let mut vetoed = 0usize;

    // 3. Noise: windowed NIS with capped terms, on the real readings of a
    // regularly sampled tag (a stored reading of an exception-reported tag
    // moved by more than the deadband by construction, so its innovations
    // are not a sample of the model's).
    let noisy = if table.sampling == Sampling::Regular { noise_windows(&g.e, obs, cfg) } else { Vec::new() };
    for (k, stat, bound) in noisy {
        let Some(row) = obs.row(k) else { continue };
        if stat <= 0.0 || fault_at[k].is_some() || !g.e[k].is_finite() {
            continue;
        }
        if in_transient(k) || near_plant_change(k) {
            vetoed += 1;
            continue;
        }
        fault_at[k] = Some(Fault::Noise);
        out.exclude.push(k);
        out.decisions.push(Decision { row, fault: Fault::Noise, stat, threshold: bound, size: 0.0, size_sd: 0.0 });
    }

    // 4. Spikes. The online gate keeps the filter clean; the verdict is the
    // smoother's standardised deletion residual (each reading against the
    // estimate from all the others, before and after it), in two passes so
    // that a spike does not mask its neighbours: first with the gated
    // readings left out, then with every reading found in the first pass
    // left out.
    // (The passes differ only in which readings they leave out, so each
    // has its own copy of the observations, not of the whole `clean`; a
    // pass that leaves no reading out has none and reads `clean.y`.)
    let first = left_out(&clean.y, |k| fault_at[k].is_some() || g.gated[k]);
    let spike_pass = |kept: &Option<Vec<f64>>| -> Result<(Vec<f64>, tagwright::tagmodel::Smoothed), String> {
        // The filter pass of `plain` is this one's when it leaves nothing
        // out (the first pass on most tags; the second one after a gated
        // reading that the smoother did not confirm as a spike).
        let mut sm = match kept {
            None => f.smooth_with_outliers_after(&clean, &plain),
            Some(y) => f.smooth_with_outliers_of(&clean, y, &clean.y),
        }
        .map_err(|e| e.to_string())?;
        Ok((std::mem::take(&mut sm.outlier), sm))
    };
    let (o1, sm1) = spike_pass(&first)?;
    let prior = fault_at.clone();
    // (The rare condition first: most readings are far inside the bound.)
    let is_spike =
        |o: &[f64], k: usize| o[k].abs() > cfg.spike && o[k].is_finite() && obs.row(k).is_some() && prior[k].is_none();
    let second = left_out(&clean.y, |k| fault_at[k].is_some() || is_spike(&o1, k));
    // The second pass changes nothing when it would leave out exactly the
    // readings the first one did.
    let (y2, y1) = (second.as_deref().unwrap_or(&clean.y), first.as_deref().unwrap_or(&clean.y));
    // (Both leaving nothing out, the usual case, need no comparison; else
    // it runs over the whole arrays without stopping, which vectorises.)
    let same = match (&second, &first) {
        (None, None) => true,
        _ => y2.len() == y1.len() && y2.iter().zip(y1).fold(true, |eq, (a, b)| eq & (a.is_nan() == b.is_nan())),
    };
    drop(first);
    let (o2, sm) = if same { (o1, sm1) } else { spike_pass(&second)? };
    drop(second);
    for k in 0..n {
        if !is_spike(&o2, k) {
            continue;
        }
        if in_transient(k) {
            vetoed += 1;
            continue;
        }
        if let Some(row) = obs.row(k) {
            fault_at[k] = Some(Fault::Spike);
            out.exclude.push(k);
            out.decisions.push(Decision {
                row,
                fault: Fault::Spike,
                stat: o2[k],
                threshold: cfg.spike,
                size: 0.0,
                size_sd: 0.0,
            });
        }
    }

    // 5. Steps: level shifts from the online pass and from the level's
    // auxiliary residuals (the second pass's smoother).
    let mut candidates: Vec<(usize, f64)> = g.shifts.iter().map(|&(k, _, e)| (k, e)).collect();
    if let Some(li) = level {
        let start = sm.diffuse_end + 3;
        let mut t = start;
        while t + 1 < n {
            let s = sm.smoother.state_aux(t, li);
            if s.is_finite() && s.abs() > cfg.step {
                // The largest of the excursion; the shift is between t and t+1.
                let mut best = (t, s);
                while t + 1 < n {
                    let s2 = sm.smoother.state_aux(t, li);
                    if !(s2.is_finite() && s2.abs() > cfg.step) {
                        break;
                    }
                    if s2.abs() > best.1.abs() {
                        best = (t, s2);
                    }
                    t += 1;
                }
                let k = best.0 + 1;
                if !candidates.iter().any(|&(c, _)| c.abs_diff(k) <= cfg.shift_run + 2) {
                    candidates.push((k, best.1));
                }
            }
            t += 1;
        }
    }
    candidates.sort_by_key(|c| c.0);
    // The readings the step sizes are measured on: without faults and
    // spikes (those vetoed as transients too).
    let cleaned: Vec<f64> = if candidates.is_empty() {
        Vec::new()
    } else {
        let set_aside = |k: usize| fault_at[k].is_some() || is_spike(&o2, k);
        left_out(&clean.y, set_aside).unwrap_or_else(|| clean.y.clone())
    };
    let mut steps: Vec<(usize, f64, f64, f64)> = Vec::new(); // (k, stat, size, size_sd)
    for &(k, stat) in &candidates {
        let (size, size_sd) = step_size(&cleaned, k, 12);
        if !size.is_finite() {
            continue;
        }
        // It must persist: without the reading at k the levels before and
        // after still differ (a lone outlier does not).
        let (later, later_sd) = step_size_skip(&cleaned, k, 12);
        if !(later.is_finite() && later.abs() > 3.0 * later_sd && later.signum() == size.signum()) {
            continue;
        }
        let at = obs.ts_us[k];
        if let Some(others) = survey.and_then(|s| s.process_change(tag, at, cfg.process_window_us, cfg.process_tags)) {
            out.process_changes.push(json!({
                "at": tagwright::engine::time_text(at),
                "size": size,
                "statistic": stat,
                "corroborated_by": others,
            }));
            continue;
        }
        steps.push((k, stat, size, size_sd));
    }
    // Readings right at a step look like outliers to a smoother that does
    // not know the step; they belong to the step.
    for &(k, ..) in &steps {
        let lo = k.saturating_sub(cfg.shift_run + 1);
        let hi = k + cfg.shift_run + 1;
        out.decisions.retain(|d| {
            let kk = k_of(d.row).unwrap_or(usize::MAX);
            !(d.fault == Fault::Spike && kk >= lo && kk <= hi)
        });
        for kk in lo..hi.min(n) {
            if fault_at[kk] == Some(Fault::Spike) {
                fault_at[kk] = None;
            }
        }
    }
    // A step lasts until a later step of the opposite sign (the sensor
    // recovered) or the end of the window.
    for (i, &(k, stat, size, size_sd)) in steps.iter().enumerate() {
        let end = steps[i + 1..].iter().find(|s| s.2.signum() != size.signum()).map_or(n, |s| s.0);
        for kk in k..end {
            if fault_at[kk].is_some() {
                continue;
            }
            if let Some(row) = obs.row(kk) {
                if obs.y[kk].is_finite() {
                    fault_at[kk] = Some(Fault::Step);
                    out.decisions.push(Decision { row, fault: Fault::Step, stat, threshold: cfg.step, size, size_sd });
                }
            }
        }
    }
    if vetoed > 0 {
        out.process_changes.push(json!({
            "transients": transients.iter().map(|&(a, b)| [tagwright::engine::time_text(a), tagwright::engine::time_text(b)]).collect::<Vec<_>>(),
            "readings_not_flagged": vetoed,
        }));
    }
    out.decisions.sort_by_key(|d| d.row);
    out.exclude.sort_unstable();
    out.exclude.dedup();
    Ok(out)
}

/// [`step_size`] with the reading at k left out of the "after" window.
fn step_size_skip(y: &[f64], k: usize, w: usize) -> (f64, f64) {
    if k + 1 >= y.len() {
        return (f64::NAN, f64::NAN);
    }
    let mut v = y[..k].to_vec();
    v.extend_from_slice(&y[k + 1..(k + 1 + 2 * w).min(y.len())]);
    let start = k.saturating_sub(2 * w);
    step_size(&v[start..], k - start, w)
}

/// Size of a level shift at grid point k: mean of up to `w` observed points
/// from k on minus the mean of up to `w` before k, with its standard error.
fn step_size(y: &[f64], k: usize, w: usize) -> (f64, f64) {
    let after: Vec<f64> = y[k..].iter().copied().filter(|v| v.is_finite()).take(w).collect();
    let before: Vec<f64> = y[..k].iter().rev().copied().filter(|v| v.is_finite()).take(w).collect();
    if after.len() < 2 || before.len() < 2 {
        return (f64::NAN, f64::NAN);
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let var = |v: &[f64], m: f64| v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() - 1) as f64;
    let (ma, mb) = (mean(&after), mean(&before));
    let se = (var(&after, ma) / after.len() as f64 + var(&before, mb) / before.len() as f64).sqrt();
    (ma - mb, se)
}

/// `y` with the readings `drop(k)` left out (NaN), or `None` when that
/// leaves no reading out. (Generic, so the test is inlined in the scans.)
fn left_out(y: &[f64], drop: impl Fn(usize) -> bool) -> Option<Vec<f64>> {
    let any = y.iter().enumerate().any(|(k, y)| !y.is_nan() && drop(k));
    any.then(|| y.iter().enumerate().map(|(k, &y)| if drop(k) { f64::NAN } else { y }).collect())
}

/// Stuck runs. A reading equal to the one before it repeats it; under the
/// model the chance of a repeat is at most p = 2 Phi(q / (2 sqrt(F))) - 1 for
/// a reading quantum q and innovation variance F >= `f_min`, so a run of L
/// repeats has probability at most p^L. Rows of runs below `stuck_alpha`
/// (and at least `stuck_min_us` long) are stuck; the first reading of the
/// run (the value that froze) is not.
fn stuck_runs(obs: &TagObs, table: &TagTable, cfg: &Config, f_min: f64) -> Vec<Decision> {
    // (Sized for every point up front: a filtered collect grows by copying.)
    let mut rows: Vec<usize> = Vec::with_capacity(obs.len());
    rows.extend(obs.rows().zip(&obs.y).filter(|(r, y)| r.is_some() && y.is_finite()).filter_map(|(r, _)| r));
    // Quantum: the smallest positive difference between consecutive readings
    // (without branches: a zero difference counts as infinite).
    // (Four running minima, not one chain of them: the minimum of finite
    // numbers does not depend on the order they are taken in.)
    let positive = |d: f64| if d > 0.0 { d } else { f64::INFINITY };
    let mut lanes = [f64::INFINITY; 4];
    if rows.len() == table.raw.len() {
        // Every row is a reading (rows[i] is i): consecutive readings are
        // consecutive cells, read without the row map.
        // (Four pairs at a time, one to a lane, which vectorises.)
        let raw = &table.raw[..];
        let (next, prev) = (raw.get(1..).unwrap_or(&[]), raw);
        let mut blocks = next.chunks_exact(4).zip(prev.chunks_exact(4));
        for (b, a) in &mut blocks {
            for j in 0..4 {
                lanes[j] = lanes[j].min(positive((b[j] - a[j]).abs()));
            }
        }
        let done = next.len() / 4 * 4;
        for (b, a) in next[done..].iter().zip(&prev[done..]) {
            lanes[0] = lanes[0].min(positive((b - a).abs()));
        }
    } else {
        for (i, w) in rows.windows(2).enumerate() {
            let l = &mut lanes[i % 4];
            *l = l.min(positive((table.raw[w[1]] - table.raw[w[0]]).abs()));
        }
    }
    let q = lanes.into_iter().fold(f64::INFINITY, f64::min);
    if !q.is_finite() || f_min.is_nan() || f_min <= 0.0 {
        return Vec::new();
    }
    let x = q / (2.0 * f_min.sqrt());
    let p = (2.0 * normal_cdf(x) - 1.0).clamp(1e-300, 1.0 - 1e-12);
    let ln_p = p.ln();
    let ln_alpha = cfg.stuck_alpha.ln();
    let period = table.period_us.max(1);
    let mut out = Vec::new();
    let mut i = 1;
    while i < rows.len() {
        let (a, b) = (rows[i - 1], rows[i]);
        let same = table.raw[b] == table.raw[a] && table.ts_us[b] - table.ts_us[a] <= period + period / 2;
        if !same {
            i += 1;
            continue;
        }
        let origin = a;
        let start = i;
        while i < rows.len()
            && table.raw[rows[i]] == table.raw[origin]
            && table.ts_us[rows[i]] - table.ts_us[rows[i - 1]] <= period + period / 2
        {
            i += 1;
        }
        let repeats = i - start;
        let value = table.raw[origin];
        let legit = cfg.constant_ok.iter().any(|c| (value - c).abs() <= q / 2.0);
        let duration = table.ts_us[rows[i - 1]] - table.ts_us[origin];
        let ln_run = repeats as f64 * ln_p;
        if !legit && ln_run < ln_alpha && duration >= cfg.stuck_min_us {
            let stat = ln_run / std::f64::consts::LN_10;
            let threshold = ln_alpha / std::f64::consts::LN_10;
            for &r in &rows[start..i] {
                out.push(Decision { row: r, fault: Fault::Stuck, stat, threshold, size: 0.0, size_sd: 0.0 });
            }
        }
    }
    out
}

/// Standard normal distribution function (via the complementary error
/// function of Abramowitz & Stegun 7.1.26 is not precise enough in the
/// tails; this uses the chi-square with one degree of freedom instead).
fn normal_cdf(x: f64) -> f64 {
    let tail = 0.5 * tagwright::stats::chi2_sf(x * x, 1.0);
    if x >= 0.0 {
        1.0 - tail
    } else {
        tail
    }
}

/// Noisy stretches: (grid point, NIS / count, bound / count) for each grid
/// point whose window of `noise_w` real readings centred on it exceeds its
/// chi-square bound and whose innovations are not all on one side (a run on
/// one side is a level change, not noise), in order.
fn noise_windows(e: &[f64], obs: &TagObs, cfg: &Config) -> Vec<(usize, f64, f64)> {
    let n = e.len();
    let mut out = Vec::new();
    let mut idx: Vec<usize> = Vec::with_capacity(n);
    idx.extend((0..n).filter(|&k| obs.row(k).is_some() && e[k].is_finite()));
    let m = idx.len();
    let w = cfg.noise_w;
    if m < w {
        return out;
    }
    let cap = cfg.spike * cfg.spike;
    // (The running sums are carried in registers and pushed, not reloaded
    // from arrays zeroed first.)
    let (mut sum, mut pos) = (Vec::with_capacity(m + 1), Vec::with_capacity(m + 1));
    sum.push(0.0);
    pos.push(0usize);
    let (mut s, mut p) = (0.0, 0usize);
    for &k in &idx {
        s += (e[k] * e[k]).min(cap);
        p += usize::from(e[k] > 0.0);
        sum.push(s);
        pos.push(p);
    }
    let bound = chi2_upper_quantile(cfg.noise_alpha, w as f64);
    let half = w / 2;
    // The window centred on reading c (shifted inside at the ends): its
    // statistic when it is flagged.
    let flagged_at = |c: usize| -> Option<f64> {
        let lo = c.saturating_sub(half).min(m - w);
        let hi = lo + w;
        let s = sum[hi] - sum[lo];
        let up = (pos[hi] - pos[lo]) as f64 / w as f64;
        (s > bound && s / w as f64 >= cfg.noise_min_factor && (0.2..=0.8).contains(&up)).then_some(s / w as f64)
    };
    // Each flagged stretch is trimmed to its first and last clearly large
    // innovation (|e| > 2.5), so that the window's half-width does not
    // spill onto the healthy readings around it.
    let mut j = 0;
    while j < m {
        if flagged_at(j).is_none() {
            j += 1;
            continue;
        }
        let a = j;
        while j < m && flagged_at(j).is_some() {
            j += 1;
        }
        let b = j;
        let first = (a..b).find(|&x| e[idx[x]].abs() > 2.5);
        let last = (a..b).rev().find(|&x| e[idx[x]].abs() > 2.5);
        if let (Some(f), Some(l)) = (first, last) {
            for x in f..=l {
                if let Some(stat) = flagged_at(x) {
                    out.push((idx[x], stat, bound / w as f64));
                }
            }
        }
    }
    out
}
