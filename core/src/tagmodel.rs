//! A tag's state-space model as the cleaning steps use it: the default model
//! chosen from the tag's ISA-5.1 measured-variable letter, the observation
//! arrays built from a [`TagTable`] (faulty readings missing, uncertain
//! readings with a larger variance, deadband knowledge for exception-reported
//! tags), maximum-likelihood fitting, and the smoothed process value with its
//! standard deviation.
//!
//! The steps share one fitted model per tag through the tag's report: the
//! first step that fits writes `model`, `params` and `loglik` into
//! [`TagReport`]; later steps rebuild the model from there
//! ([`Fitted::from_report`]) instead of fitting again.

use std::collections::BTreeMap;

use crate::plugin::{TagReport, TagSettings};
use crate::series::{Quality, Sampling, Status, TagTable};
use crate::ssm::{self, FilterOptions, FitOptions, ModelSpec, Observations, SmootherOutput, StateSpace};

/// The model a tag gets when the pipeline names none, from the first letter
/// of its ISA-5.1 tag (the measured or initiating variable), with the reason.
///
/// | letter | variable | default |
/// |---|---|---|
/// | F flow, P pressure (incl. PD), T temperature, L level, D density, W weight/force, S speed | continuous process variables that wander and fluctuate around it | `local-level+arma(1,0)` |
/// | A analysis, Q quantity, anything else | slow, sparsely sampled analysers | `local-level` |
///
/// (The letter meanings are ISA-5.1's; the choice of model per letter is
/// tagwright's, common practice, no source.)
pub fn default_model(tag: &str) -> (ModelSpec, String) {
    let letter = tag.trim_start().chars().next().map(|c| c.to_ascii_uppercase());
    let (spec, what) = match letter {
        Some('F') => ("local-level+arma(1,0)", "flow"),
        Some('P') => ("local-level+arma(1,0)", "pressure"),
        Some('T') => ("local-level+arma(1,0)", "temperature"),
        Some('L') => ("local-level+arma(1,0)", "level"),
        Some('D') => ("local-level+arma(1,0)", "density"),
        Some('W') => ("local-level+arma(1,0)", "weight"),
        Some('S') => ("local-level+arma(1,0)", "speed"),
        Some('A') => ("local-level", "analyser"),
        _ => ("local-level", "unclassified"),
    };
    let parsed = spec.parse::<ModelSpec>().unwrap_or_else(|_| ModelSpec::local_level());
    (parsed, format!("default for a {what} tag (ISA-5.1 letter {})", letter.unwrap_or('?')))
}

/// Observation arrays of one tag on its time grid.
///
/// The grid is the table's rows, plus, for an exception-reported tag, a
/// pseudo-row at every scan time inside a quiet stretch (no stored sample):
/// the source scanned there and found the value within ±deadband of the last
/// stored reading, so the pseudo-observation is that reading with the extra
/// variance deadband²/3 of a uniform error on ±deadband, multiplied by the
/// number of scans in the stretch (they share one error, see the code).
#[derive(Debug, Clone, Default)]
pub struct TagObs {
    /// Observation per grid point (NaN = missing).
    pub y: Vec<f64>,
    /// Time to the next grid point in nominal periods (last entry 1).
    pub dt: Vec<f64>,
    /// Multiplier of the observation variance per grid point.
    pub w: Vec<f64>,
    /// Absolute extra variance per grid point (deadband pseudo-observations);
    /// folded into `w` by [`TagObs::set_noise`]. Empty when every one is 0
    /// (a regularly sampled tag).
    extra_var: Vec<f64>,
    /// Base multiplier per grid point (uncertain quality, noisy readings).
    base_w: Vec<f64>,
    /// Grid time per point, µs UTC.
    pub ts_us: Vec<i64>,
    /// Table row of each grid point ([`NO_ROW`] for a pseudo-row); empty
    /// when grid point k is table row k (a regularly sampled tag). Read it
    /// with [`TagObs::row`] or [`TagObs::rows`].
    rows: Vec<usize>,
}

/// A pseudo-row's entry in [`TagObs`]'s row map.
const NO_ROW: usize = usize::MAX;

impl TagObs {
    /// Builds the arrays. `use_row(i)` says whether table row `i` is an
    /// observation (rows inserted in gaps, status `filled`, never are; on an
    /// exception-reported tag they carry the deadband pseudo-observation).
    /// `max_quiet_us` bounds a quiet stretch of an exception-reported tag
    /// (longer ones are gaps: no pseudo-observations).
    pub fn build(
        table: &TagTable,
        uncertain_factor: f64,
        use_row: impl Fn(usize) -> bool,
        max_quiet_us: i64,
    ) -> TagObs {
        if table.sampling == Sampling::Regular {
            return Self::build_regular(table, uncertain_factor, use_row);
        }
        Self::build_general(table, uncertain_factor, use_row, max_quiet_us)
    }

    /// [`TagObs::build`] for any sampling.
    fn build_general(
        table: &TagTable,
        uncertain_factor: f64,
        use_row: impl Fn(usize) -> bool,
        max_quiet_us: i64,
    ) -> TagObs {
        let n = table.len();
        let period = table.period_us.max(1);
        // One grid point per row at least (an exception-reported tag adds
        // its quiet stretches' points to that).
        let mut o = TagObs {
            y: Vec::with_capacity(n),
            dt: Vec::with_capacity(n),
            w: Vec::new(),
            extra_var: Vec::with_capacity(n),
            base_w: Vec::with_capacity(n),
            ts_us: Vec::with_capacity(n),
            rows: Vec::with_capacity(n),
        };
        let deadband = match table.sampling {
            Sampling::Exception { deadband } => Some(deadband),
            Sampling::Regular => None,
        };
        let mut last_stored: Option<(i64, f64)> = None;
        for i in 0..n {
            let usable = use_row(i) && table.raw[i].is_finite();
            let w = if table.quality[i] == Quality::Uncertain { uncertain_factor.max(1.0) } else { 1.0 };
            if table.status[i] == Status::Filled {
                // An inserted row: for an exception-reported tag inside a
                // quiet stretch, the deadband pseudo-observation.
                match (deadband, last_stored) {
                    (Some(db), Some((t0, v))) if table.ts_us[i] - t0 <= max_quiet_us => {
                        o.push(table.ts_us[i], v, 1.0, db * db / 3.0, Some(i))
                    }
                    _ => o.push(table.ts_us[i], f64::NAN, 1.0, 0.0, Some(i)),
                }
                continue;
            }
            o.push(table.ts_us[i], if usable { table.raw[i] } else { f64::NAN }, w, 0.0, Some(i));
            last_stored = usable.then_some((table.ts_us[i], table.raw[i]));
            if let (Some(db), Some(next)) = (deadband, table.ts_us.get(i + 1)) {
                let gap = next - table.ts_us[i];
                if gap > period && gap <= max_quiet_us {
                    let mut t = table.ts_us[i] + period;
                    while t < *next {
                        let y = last_stored.map_or(f64::NAN, |(_, v)| v);
                        o.push(t, y, 1.0, db * db / 3.0, None);
                        t += period;
                    }
                }
            }
        }
        // The pseudo-observations of one quiet stretch share one error (the
        // value stayed inside one band), so together they carry about one
        // observation's information: each gets the band variance times the
        // number of scans in the stretch.
        let mut k = 0;
        while k < o.extra_var.len() {
            if o.extra_var[k] > 0.0 {
                let a = k;
                while k < o.extra_var.len() && o.extra_var[k] > 0.0 {
                    k += 1;
                }
                let len = (k - a) as f64;
                o.extra_var[a..k].iter_mut().for_each(|v| *v *= len);
            } else {
                k += 1;
            }
        }
        for k in 0..o.ts_us.len() {
            o.dt.push(match o.ts_us.get(k + 1) {
                Some(next) => ((next - o.ts_us[k]) as f64 / period as f64).max(1e-6),
                None => 1.0,
            });
        }
        o.w = o.base_w.clone();
        o
    }

    /// [`TagObs::build`] for a regularly sampled tag: one grid point per
    /// row, no pseudo-observation, so each array is filled in one pass of
    /// its own (the same values the general loop gives).
    fn build_regular(table: &TagTable, uncertain_factor: f64, use_row: impl Fn(usize) -> bool) -> TagObs {
        let n = table.len();
        let period = table.period_us.max(1) as f64;
        let uncertain = uncertain_factor.max(1.0);
        // (Each array in a pass of its own over zipped slices, written by
        // `extend` without a capacity check per element.)
        let m = n.min(table.raw.len()).min(table.status.len()).min(table.quality.len());
        let (raw, status, quality) = (&table.raw[..m], &table.status[..m], &table.quality[..m]);
        let mut y = Vec::with_capacity(n);
        y.extend(raw.iter().zip(status).enumerate().map(|(i, (&raw, &status))| {
            if status != Status::Filled && raw.is_finite() && use_row(i) {
                raw
            } else {
                f64::NAN
            }
        }));
        let mut base_w = Vec::with_capacity(n);
        base_w.extend(status.iter().zip(quality).map(|(&status, &quality)| {
            if status != Status::Filled && quality == Quality::Uncertain {
                uncertain
            } else {
                1.0
            }
        }));
        // (One period is the usual step: its quotient, 1, needs no division.)
        let one = table.period_us.max(1);
        let mut dt = Vec::with_capacity(n);
        dt.extend(table.ts_us.windows(2).map(|w| {
            let d = w[1] - w[0];
            if d == one {
                1.0
            } else {
                (d as f64 / period).max(1e-6)
            }
        }));
        if n > 0 {
            dt.push(1.0);
        }
        // (No pseudo-observation: `extra_var` and the row map stay empty.)
        TagObs { y, dt, w: base_w.clone(), extra_var: Vec::new(), base_w, ts_us: table.ts_us.clone(), rows: Vec::new() }
    }

    /// Table row of grid point `k`, or `None` for a pseudo-row (or past the end).
    #[inline]
    pub fn row(&self, k: usize) -> Option<usize> {
        if self.rows.is_empty() {
            (k < self.y.len()).then_some(k)
        } else {
            self.rows.get(k).copied().filter(|&r| r != NO_ROW)
        }
    }

    /// Table row of every grid point in order ([`TagObs::row`]).
    #[inline]
    pub fn rows(&self) -> impl Iterator<Item = Option<usize>> + '_ {
        let identity = self.rows.is_empty();
        (0..self.y.len()).map(move |k| if identity { Some(k) } else { Some(self.rows[k]).filter(|&r| r != NO_ROW) })
    }

    /// True when grid point k is table row k for every k (no pseudo-row).
    #[inline]
    pub fn rows_are_grid(&self) -> bool {
        self.rows.is_empty()
    }

    /// Absolute extra variance of grid point `k` (0 without one).
    #[inline]
    fn extra(&self, k: usize) -> f64 {
        self.extra_var.get(k).copied().unwrap_or(0.0)
    }

    fn push(&mut self, ts: i64, y: f64, w: f64, extra: f64, row: Option<usize>) {
        self.ts_us.push(ts);
        self.y.push(y);
        self.base_w.push(w);
        self.extra_var.push(extra);
        self.rows.push(row.unwrap_or(NO_ROW));
    }

    /// Number of grid points.
    pub fn len(&self) -> usize {
        self.y.len()
    }

    /// True when there is no grid point.
    pub fn is_empty(&self) -> bool {
        self.y.is_empty()
    }

    /// Number of observed grid points.
    pub fn observed(&self) -> usize {
        self.y.iter().filter(|v| !v.is_nan()).count()
    }

    /// Sets the variance multiplier of grid point `k` (e.g. a noisy reading).
    pub fn set_base_weight(&mut self, k: usize, w: f64) {
        self.base_w[k] = w;
        self.w[k] = w;
    }

    /// Folds the absolute pseudo-observation variances into `w` for an
    /// observation noise variance `h` (the model's). Call before each fit or
    /// filter run when `h` changes.
    pub fn set_noise(&mut self, h: f64) {
        if self.extra_var.is_empty() {
            // (base + 0 / h is base.)
            self.w.copy_from_slice(&self.base_w);
            return;
        }
        let h = h.max(1e-300);
        for k in 0..self.y.len() {
            self.w[k] = self.base_w[k] + self.extra_var[k] / h;
        }
    }

    /// The arrays as the filter's input.
    pub fn observations(&self) -> Observations<'_> {
        Observations { y: &self.y, p: 1, dt: Some(&self.dt), h_scale: Some(&self.w) }
    }

    /// A subsample for fitting: `blocks` runs of consecutive grid points,
    /// evenly spread over the window, with about `max_points` observed points
    /// in all; the time between blocks is kept in `dt`, so the likelihood
    /// lets the state evolve over the skipped time exactly. `None` when the
    /// whole window has no more than `max_points` observations.
    pub fn subsample(&self, max_points: usize, blocks: usize) -> Option<TagObs> {
        let (len, stride) = self.sample_layout(max_points, blocks)?;
        let n = self.len();
        let mut o = TagObs::default();
        for b in 0..blocks {
            let start = b * stride + (stride - len) / 2;
            for k in start..start + len {
                o.push(self.ts_us[k], self.y[k], self.base_w[k], self.extra(k), self.row(k));
                o.w.push(self.w[k]);
                // Time to the next kept point: within a block one step;
                // at a block's end, everything up to the next block.
                let next = if k + 1 < start + len { k + 1 } else { ((b + 1) * stride + (stride - len) / 2).min(n) };
                o.dt.push(if next < n { self.dt[k..next].iter().sum::<f64>().max(1e-6) } else { 1.0 });
            }
        }
        Some(o)
    }

    /// The grid points [`TagObs::subsample`] keeps, block by block; `None`
    /// when it keeps them all.
    pub fn sample_ranges(&self, max_points: usize, blocks: usize) -> Option<Vec<std::ops::Range<usize>>> {
        let (len, stride) = self.sample_layout(max_points, blocks)?;
        Some(
            (0..blocks)
                .map(|b| {
                    let start = b * stride + (stride - len) / 2;
                    start..start + len
                })
                .collect(),
        )
    }

    /// Block length and stride (grid points) of a subsample, if one is taken.
    fn sample_layout(&self, max_points: usize, blocks: usize) -> Option<(usize, usize)> {
        let observed = self.observed();
        if observed <= max_points || blocks == 0 {
            return None;
        }
        let n = self.len();
        let per_block = (max_points / blocks).max(16);
        // Block length in grid points, scaled by the share of observed points.
        let len = ((per_block as f64) * n as f64 / observed as f64).ceil() as usize;
        let stride = n / blocks;
        if len >= stride {
            return None;
        }
        Some((len, stride))
    }

    /// Marks grid point `k` missing.
    pub fn drop_point(&mut self, k: usize) {
        self.y[k] = f64::NAN;
    }
}

/// Blocks of the subsample [`Fitted::fit_at_most`] fits a long window on.
pub const FIT_BLOCKS: usize = 8;

/// A fitted (or given) model of one tag.
#[derive(Debug, Clone)]
pub struct Fitted {
    pub spec: ModelSpec,
    pub names: Vec<String>,
    pub params: Vec<f64>,
    pub loglik: f64,
    pub converged: bool,
    pub model: StateSpace,
}

/// Why a tag could not be modelled.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct ModelError(pub String);

impl Fitted {
    /// Fits `spec` by maximum likelihood on the observations (deadband
    /// pseudo-observation variances folded in at the noise level of the
    /// start, then once more at the fitted level).
    pub fn fit(spec: &ModelSpec, obs: &mut TagObs, start: Option<Vec<f64>>) -> Result<Fitted, ModelError> {
        Self::fit_at_most(spec, obs, start, usize::MAX)
    }

    /// [`Fitted::fit`] on at most `max_points` observations: a longer window
    /// is fitted on [`TagObs::subsample`] ([`FIT_BLOCKS`] blocks; the points
    /// are [`TagObs::sample_ranges`]), and the deadband
    /// variances of the whole window are then set at the fitted noise level.
    pub fn fit_at_most(
        spec: &ModelSpec,
        obs: &mut TagObs,
        start: Option<Vec<f64>>,
        max_points: usize,
    ) -> Result<Fitted, ModelError> {
        match obs.subsample(max_points, FIT_BLOCKS) {
            Some(mut sub) => {
                let f = Self::fit_all(spec, &mut sub, start)?;
                obs.set_noise(f.obs_noise());
                Ok(f)
            }
            None => Self::fit_all(spec, obs, start),
        }
    }

    fn fit_all(spec: &ModelSpec, obs: &mut TagObs, start: Option<Vec<f64>>) -> Result<Fitted, ModelError> {
        let n_obs = obs.observed();
        let k = spec.param_names().len();
        if n_obs < (k + spec.n_diffuse() + 2).max(8) {
            return Err(ModelError(format!(
                "too few usable readings ({n_obs}) to fit {spec} ({k} parameters); give the parameters or use a smaller model"
            )));
        }
        let has_extra = obs.extra_var.iter().any(|&v| v > 0.0);
        let h0 = start.as_ref().and_then(|p| obs_noise(spec, p)).unwrap_or_else(|| rough_noise(&obs.y));
        obs.set_noise(h0);
        let opts = FitOptions { max_iter: 150, std_errors: false, start, ..FitOptions::default() };
        let mut res = ssm::fit(spec, &obs.observations(), &opts).map_err(|e| ModelError(e.to_string()))?;
        if has_extra {
            if let Some(h) = obs_noise(spec, &res.params) {
                obs.set_noise(h);
                let opts = FitOptions { start: Some(res.params.clone()), ..opts };
                res = ssm::fit(spec, &obs.observations(), &opts).map_err(|e| ModelError(e.to_string()))?;
                if let Some(h) = obs_noise(spec, &res.params) {
                    obs.set_noise(h);
                }
            }
        }
        let model = spec.build(&res.params).map_err(|e| ModelError(e.to_string()))?;
        Ok(Fitted {
            spec: spec.clone(),
            names: res.param_names,
            params: res.params,
            loglik: res.loglik,
            converged: res.converged,
            model,
        })
    }

    /// A model with given parameters (by name; every parameter must be given).
    pub fn given(spec: &ModelSpec, by_name: &BTreeMap<String, f64>) -> Result<Fitted, ModelError> {
        let names = spec.param_names();
        let mut params = Vec::with_capacity(names.len());
        for n in &names {
            match by_name.get(n) {
                Some(&v) => params.push(v),
                None => {
                    return Err(ModelError(format!(
                        "parameter `{n}` of {spec} is not given (needed: {})",
                        names.join(", ")
                    )))
                }
            }
        }
        let model = spec.build(&params).map_err(|e| ModelError(e.to_string()))?;
        Ok(Fitted { spec: spec.clone(), names, params, loglik: f64::NAN, converged: true, model })
    }

    /// The model an earlier step wrote into the report, if any.
    pub fn from_report(report: &TagReport) -> Option<Fitted> {
        let spec: ModelSpec = report.model.as_deref()?.parse().ok()?;
        let mut f = Fitted::given(&spec, &report.params).ok()?;
        f.loglik = report.loglik.unwrap_or(f64::NAN);
        Some(f)
    }

    /// Writes the model into the report (model, params, loglik).
    pub fn to_report(&self, report: &mut TagReport) {
        report.model = Some(self.spec.to_string());
        report.params = self.names.iter().cloned().zip(self.params.iter().copied()).collect();
        report.loglik = self.loglik.is_finite().then_some(self.loglik);
    }

    /// Observation noise variance h (0 for a model without noise).
    pub fn obs_noise(&self) -> f64 {
        obs_noise(&self.spec, &self.params).unwrap_or(0.0)
    }

    /// Log-likelihood of the observations under this model.
    pub fn loglik_of(&self, obs: &TagObs) -> Result<f64, ModelError> {
        ssm::filter(&self.model, &obs.observations(), &FilterOptions::loglik_only())
            .map(|f| f.loglik)
            .map_err(|e| ModelError(e.to_string()))
    }

    /// The smoothed signal and its standard deviation at every grid point
    /// ([`Fitted::smooth`]'s `mean` and `sd`), taken from this thread's last
    /// smoother pass with deletion residuals when that pass had exactly this
    /// model and these observations (bit for bit: readings, variance
    /// multipliers and time steps), else computed. A step that runs after the
    /// fault tests on a tag they left unchanged (the usual case) then skips
    /// a smoother pass; the result is the same either way.
    pub fn smooth_signal(&self, obs: &TagObs) -> Result<(Vec<f64>, Vec<f64>), ModelError> {
        let hit = SIGNAL_MEMO.with(|memo| {
            let mut memo = memo.borrow_mut();
            let found = memo.matches(self, obs).then(|| (std::mem::take(&mut memo.mean), std::mem::take(&mut memo.sd)));
            if found.is_some() {
                memo.clear();
            }
            found
        });
        if let Some(found) = hit {
            return Ok(found);
        }
        let sm = self.smooth(obs, false)?;
        Ok((sm.mean, sm.sd))
    }

    /// [`Fitted::smooth_signal`] of the observations that
    /// `TagObs::build(table, uncertain_factor, use_row, _)` followed by
    /// `set_noise` would give on a regularly sampled table, where
    /// `use_row(i)` is "row i has status `ok`" (a step that also uses other
    /// rows, noisy ones say, cannot take it), when this thread's last
    /// smoother pass with deletion residuals had exactly those observations
    /// (checked row by row against the table, without building them): the
    /// readings per row (NaN where none), the signal and its standard
    /// deviation, taken from the memo. `None` otherwise (build the
    /// observations and call [`Fitted::smooth_signal`]).
    pub fn kept_signal_of_table(
        &self,
        table: &TagTable,
        uncertain_factor: f64,
    ) -> Option<(Vec<f64>, Vec<f64>, Vec<f64>)> {
        SIGNAL_MEMO.with(|memo| {
            let mut memo = memo.borrow_mut();
            if !(memo.model_is(self, table.len()) && memo.matches_table(table, uncertain_factor)) {
                return None;
            }
            let found = (std::mem::take(&mut memo.y), std::mem::take(&mut memo.mean), std::mem::take(&mut memo.sd));
            memo.clear();
            Some(found)
        })
    }

    /// Smoothed process value (the signal Z a_t + d, without observation
    /// noise) and its standard deviation at every grid point.
    pub fn smooth(&self, obs: &TagObs, keep_aux: bool) -> Result<Smoothed, ModelError> {
        self.smooth_inner(obs, &obs.y, keep_aux, None, None)
    }

    /// The smoother with its auxiliary cumulants (as [`Fitted::smooth`] with
    /// `keep_aux`, but `mean` and `sd` left empty) and, at every grid point
    /// where `y_all` has a reading, the standardised deletion residual: the reading against the
    /// smoothed estimate from all *other* observations, divided by its
    /// standard deviation. For an observed point it is u_t / sqrt(D_t) with
    /// u_t = (v_t - k_t' r_t) / F_t and D_t = 1/F_t + k_t' N_t k_t / F_t^2
    /// (the smoothed observation disturbance of DK 2012 §4.5.3 in univariate
    /// form; its square is the test statistic for an additive outlier, de
    /// Jong & Penzer 1998); for a point left out of `obs` it is
    /// (y - signal) / sqrt(Var(signal) + h w). Defined with or without
    /// observation noise; NaN inside the diffuse start.
    pub fn smooth_with_outliers(&self, obs: &TagObs, y_all: &[f64]) -> Result<Smoothed, ModelError> {
        self.smooth_inner(obs, &obs.y, true, Some(y_all), None)
    }

    /// [`Fitted::smooth_with_outliers`] on the observations `y` (one per grid
    /// point of `obs`, NaN = left out) instead of `obs.y`: the callers that
    /// try several sets of left-out readings need not copy the whole `obs`.
    pub fn smooth_with_outliers_of(&self, obs: &TagObs, y: &[f64], y_all: &[f64]) -> Result<Smoothed, ModelError> {
        if y.len() != obs.len() {
            return Err(ModelError(format!("{} observations for {} grid points", y.len(), obs.len())));
        }
        self.smooth_inner(obs, y, true, Some(y_all), None)
    }

    /// [`Fitted::smooth_with_outliers`] on `obs` itself, reusing the filter
    /// pass that [`Fitted::innovations`] ran on this thread for these
    /// observations (when it was the last call of `innovations` on this
    /// thread; else the filter runs again, with the same result).
    pub fn smooth_with_outliers_after(&self, obs: &TagObs, innov: &Innovations) -> Result<Smoothed, ModelError> {
        self.smooth_inner(obs, &obs.y, true, Some(&obs.y), Some(innov.pass))
    }

    /// The standardised innovations e_t = v_t / sqrt(F_t) of the filter over
    /// `obs` (exact diffuse start), from the first reading after the
    /// diffuse states and `min_warm` more readings have been taken in (NaN
    /// before, and where a reading is missing or left out). The filter's
    /// arrays stay in this thread for [`Fitted::smooth_with_outliers_after`].
    pub fn innovations(&self, obs: &TagObs, min_warm: usize) -> Result<Innovations, ModelError> {
        let o = obs.observations();
        FILTER_WORK.with(|work| {
            let FilterWork { kept_pass: pass, kept: filt, kept_y, .. } = &mut *work.borrow_mut();
            filt.skip_filtered = true;
            *pass = 0;
            *kept_y = obs.y.as_ptr() as usize;
            ssm::filter_into(&self.model, &o, &stored_pass(), filt).map_err(|e| ModelError(e.to_string()))?;
            let n = obs.len();
            let (mut e, mut v) = (vec![f64::NAN; n], vec![f64::NAN; n]);
            let warm_after = self.model.n_diffuse() + min_warm;
            // The first regular update after `warm_after` updates (diffuse or
            // regular) have been taken in.
            let end = n.min(filt.kind.len()).min(filt.v.len()).min(filt.f.len());
            let mut updates = 0usize;
            let mut warm = end;
            for (t, kind) in filt.kind[..end].iter().enumerate() {
                if matches!(kind, ssm::filter::ElemKind::Regular | ssm::filter::ElemKind::Diffuse) {
                    if updates >= warm_after && *kind == ssm::filter::ElemKind::Regular {
                        warm = t;
                        break;
                    }
                    updates += 1;
                }
            }
            // From there on, every regular update's innovation (a select
            // without branches, which vectorises).
            let rows = e[warm..end].iter_mut().zip(&mut v[warm..end]);
            let from = filt.kind[warm..end].iter().zip(&filt.v[warm..end]).zip(&filt.f[warm..end]);
            for ((et, vt), ((kind, &fv), &ff)) in rows.zip(from) {
                let regular = *kind == ssm::filter::ElemKind::Regular;
                *vt = if regular { fv } else { f64::NAN };
                *et = if regular { fv / ff.sqrt() } else { f64::NAN };
            }
            *pass = next_pass_id();
            Ok(Innovations { e, v, pass: *pass })
        })
    }

    fn smooth_inner(
        &self,
        obs: &TagObs,
        y: &[f64],
        keep_aux: bool,
        y_all: Option<&[f64]>,
        after: Option<u64>,
    ) -> Result<Smoothed, ModelError> {
        let o = Observations { y, ..obs.observations() };
        FILTER_WORK.with(|work| {
            let FilterWork { kept_pass, kept, kept_y, other } = &mut *work.borrow_mut();
            // (The same readings as well as the same pass: a caller that
            // hands over other observations gets a fresh filter run.)
            let same_obs = *kept_y == obs.y.as_ptr() as usize && kept.n == obs.len();
            let reuse = after.is_some_and(|id| id == *kept_pass && same_obs && kept.is_stored());
            let filt = if reuse { kept } else { other };
            if !reuse {
                // The smoother reads the predicted states, not the filtered ones.
                filt.skip_filtered = true;
                ssm::filter_into(&self.model, &o, &stored_pass(), filt).map_err(|e| ModelError(e.to_string()))?;
            }
            let filt = &*filt;
            let keep_del = y_all.is_some() && o.p == 1;
            // Only the signal, its variance and the auxiliary residuals are
            // read here, so the smoother keeps just those (`lean`).
            let mut sm = SmootherOutput { keep_aux, keep_del, lean: true, ..Default::default() };
            ssm::smooth_into(&self.model, &o, filt, &mut sm);
            let n = obs.len();
            let (mut mean, mut sd) = (Vec::new(), Vec::new());
            let outlier = match y_all {
                Some(y_all) => {
                    let outlier = self.deletion_residuals(obs, filt, &sm, y_all);
                    SIGNAL_MEMO.with(|memo| memo.borrow_mut().keep(self, &o, &mut sm));
                    outlier
                }
                None => {
                    self.signal_into(&mut sm, n, &mut mean, &mut sd);
                    Vec::new()
                }
            };
            Ok(Smoothed { mean, sd, smoother: sm, diffuse_end: filt.diffuse_end, outlier })
        })
    }

    /// Sets `mean` and `sd` to the smoothed signal z a_t + d and its
    /// standard deviation at the first `n` grid points of `sm` (a lean
    /// pass: its signal arrays are taken, so `sm` no longer holds them).
    fn signal_into(&self, sm: &mut SmootherOutput, n: usize, mean: &mut Vec<f64>, sd: &mut Vec<f64>) {
        debug_assert!(sm.lean && sm.sig_mean.len() >= n);
        *mean = std::mem::take(&mut sm.sig_mean);
        mean.truncate(n);
        *sd = std::mem::take(&mut sm.sig_var);
        sd.truncate(n);
        sd.iter_mut().for_each(|v| *v = v.sqrt());
    }

    /// Standardised deletion residuals (see [`Fitted::smooth_with_outliers`]):
    /// the smoother's own for a regular element, else the reading against
    /// the smoothed signal and its variance plus the observation noise.
    fn deletion_residuals(
        &self,
        obs: &TagObs,
        filt: &ssm::FilterOutput,
        sm: &SmootherOutput,
        y_all: &[f64],
    ) -> Vec<f64> {
        let n = obs.len();
        let h = self.model.h[0];
        let mut out = vec![f64::NAN; n];
        for (t, out_t) in out.iter_mut().enumerate().skip(filt.diffuse_end) {
            let Some(&y) = y_all.get(t) else { break };
            if !y.is_finite() {
                continue;
            }
            if filt.kind.get(t) == Some(&ssm::filter::ElemKind::Regular) && sm.keep_del {
                *out_t = sm.del[t];
                continue;
            }
            let mean = sm.sig_mean[t];
            let var = sm.sig_var[t] + h * obs.w[t];
            if var > 0.0 {
                *out_t = (y - mean) / var.sqrt();
            }
        }
        out
    }
}

/// Standardised innovations of a filter pass ([`Fitted::innovations`]).
#[derive(Debug, Clone)]
pub struct Innovations {
    /// v_t / sqrt(F_t) once warm, NaN elsewhere.
    pub e: Vec<f64>,
    /// v_t where `e` is defined, NaN elsewhere.
    pub v: Vec<f64>,
    /// Which filter pass of this thread it came from.
    pass: u64,
}

/// The options of the passes whose stored arrays the steps read (innovations,
/// smoother): the defaults, without the log-likelihood (none of them reads it).
fn stored_pass() -> FilterOptions {
    FilterOptions { loglik: false, ..Default::default() }
}

/// A number no earlier filter pass of the process was given (0 is never one).
fn next_pass_id() -> u64 {
    static NEXT: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(1);
    NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
}

/// The filter's stored arrays, reused from tag to tag on a thread (tens of
/// MB for a long window: fresh pages cost more than the recursion that
/// fills them).
#[derive(Default)]
struct FilterWork {
    /// The id of the pass in `kept` ([`Fitted::innovations`]), 0 if none.
    kept_pass: u64,
    /// Address of the readings that pass ran on.
    kept_y: usize,
    /// The last pass of [`Fitted::innovations`], which a later smoother
    /// pass on the same observations reuses, even after other passes.
    kept: ssm::FilterOutput,
    /// Every other pass.
    other: ssm::FilterOutput,
}

thread_local! {
    static FILTER_WORK: std::cell::RefCell<FilterWork> = Default::default();
}

thread_local! {
    /// The signal of this thread's last smoother pass with deletion
    /// residuals, for [`Fitted::smooth_signal`].
    static SIGNAL_MEMO: std::cell::RefCell<SignalMemo> = Default::default();
}

/// A smoothed signal with everything that determines it: the model (spec
/// and parameters) and the observations, all compared bit for bit.
#[derive(Default)]
struct SignalMemo {
    spec: String,
    params: Vec<u64>,
    y: Vec<f64>,
    w: Vec<f64>,
    dt: Vec<f64>,
    mean: Vec<f64>,
    sd: Vec<f64>,
}

fn bits(x: &[f64]) -> impl Iterator<Item = u64> + '_ {
    x.iter().map(|v| v.to_bits())
}

impl SignalMemo {
    fn clear(&mut self) {
        self.params.clear();
        for v in [&mut self.y, &mut self.w, &mut self.dt] {
            v.clear();
        }
        self.spec.clear();
        self.mean.clear();
        self.sd.clear();
    }

    /// Keeps the signal of a pass on `o` (a univariate grid with its time
    /// steps and variance multipliers, as [`TagObs::observations`] gives).
    fn keep(&mut self, f: &Fitted, o: &Observations, sm: &mut SmootherOutput) {
        self.clear();
        let (Some(dt), Some(w)) = (o.dt, o.h_scale) else { return };
        if o.p != 1 {
            return;
        }
        let n = o.len();
        if !sm.lean || sm.sig_mean.len() < n || sm.sig_var.len() < n {
            return;
        }
        self.spec = f.spec.to_string();
        self.params.extend(bits(&f.params));
        self.y.extend_from_slice(o.y);
        self.w.extend_from_slice(w);
        self.dt.extend_from_slice(dt);
        f.signal_into(sm, n, &mut self.mean, &mut self.sd);
    }

    fn matches(&self, f: &Fitted, obs: &TagObs) -> bool {
        // (The long arrays are compared without early exit, which vectorises.)
        let same = |kept: &[f64], x: &[f64]| {
            kept.len() == x.len() && kept.iter().zip(x).fold(true, |eq, (a, b)| eq & (a.to_bits() == b.to_bits()))
        };
        self.model_is(f, obs.len()) && same(&self.y, &obs.y) && same(&self.w, &obs.w) && same(&self.dt, &obs.dt)
    }

    /// True when the kept signal has `n` points and came from the model of `f`.
    fn model_is(&self, f: &Fitted, n: usize) -> bool {
        !self.mean.is_empty()
            && self.mean.len() == n
            && self.y.len() == n
            && self.w.len() == n
            && self.dt.len() == n
            && self.params.iter().copied().eq(bits(&f.params))
            && self.spec == f.spec.to_string()
    }

    /// True when the kept pass's observations are the ones
    /// [`TagObs::build`] gives for `table` (regularly sampled), once the
    /// noise is set, when the readings are the rows of status `ok` with a
    /// finite raw value: readings (NaN where none), variance multipliers
    /// and time steps, compared per row as `build_regular` would write
    /// them, without building them. (Each comparison runs over zipped
    /// slices without branches or early exit, which vectorises.)
    fn matches_table(&self, table: &TagTable, uncertain_factor: f64) -> bool {
        let n = table.len();
        if table.sampling != Sampling::Regular
            || table.raw.len() != n
            || table.status.len() != n
            || table.quality.len() != n
            || self.y.len() != n
            || self.w.len() != n
        {
            return false;
        }
        let uncertain = uncertain_factor.max(1.0).to_bits();
        let one = 1.0f64.to_bits();
        let rows = table.raw.iter().zip(&table.status).zip(&table.quality).zip(self.y.iter().zip(&self.w));
        let same = rows.fold(true, |eq, (((&raw, &status), &quality), (&y, &w))| {
            // Readings: the same value, or both missing.
            let ok = status == Status::Ok;
            let reading = ok & raw.is_finite();
            let y_same = (reading & (raw.to_bits() == y.to_bits())) | (!reading & y.is_nan());
            let w_want = if (status != Status::Filled) & (quality == Quality::Uncertain) { uncertain } else { one };
            eq & y_same & (w_want == w.to_bits())
        });
        let step = table.period_us.max(1);
        let period = step as f64;
        let steps = table.ts_us.windows(2).zip(&self.dt).fold(true, |eq, (t, &kept)| {
            let d = t[1] - t[0];
            let dt = if d == step { 1.0 } else { (d as f64 / period).max(1e-6) };
            eq & (dt.to_bits() == kept.to_bits())
        });
        same && steps && self.dt.last().is_some_and(|&d| d == 1.0)
    }
}

/// Result of [`Fitted::smooth`].
#[derive(Debug, Clone)]
pub struct Smoothed {
    /// Smoothed signal and its standard deviation per grid point (empty
    /// from [`Fitted::smooth_with_outliers`]).
    pub mean: Vec<f64>,
    pub sd: Vec<f64>,
    /// The smoother's output (states, covariances, and with `keep_aux` the
    /// cumulants for auxiliary residuals).
    pub smoother: SmootherOutput,
    /// First grid point after the diffuse phase.
    pub diffuse_end: usize,
    /// Standardised deletion residuals ([`Fitted::smooth_with_outliers`] only).
    pub outlier: Vec<f64>,
}

/// The observation noise variance in a parameter vector of `spec`.
fn obs_noise(spec: &ModelSpec, params: &[f64]) -> Option<f64> {
    spec.param_names().iter().position(|n| n == "sigma2.obs").and_then(|i| params.get(i).copied())
}

/// A rough observation noise variance for a start: half the median squared
/// first difference.
fn rough_noise(y: &[f64]) -> f64 {
    let mut d: Vec<f64> =
        y.windows(2).filter(|w| w[0].is_finite() && w[1].is_finite()).map(|w| (w[1] - w[0]).powi(2)).collect();
    if d.is_empty() {
        return 1.0;
    }
    let mid = d.len() / 2;
    d.select_nth_unstable_by(mid, f64::total_cmp);
    (0.5 * d[mid]).max(1e-12)
}

/// The model of a tag: the settings' model or the default for its letter.
pub fn model_for(tag: &str, settings: &TagSettings) -> (ModelSpec, String) {
    match &settings.model {
        Some(m) => (m.clone(), "from the pipeline".to_string()),
        None => default_model(tag),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::series::{ReadCounts, TagSeries};

    fn table(ts: Vec<i64>, v: Vec<f64>, sampling: Sampling) -> TagTable {
        let n = ts.len();
        let s = TagSeries {
            tag: "LT-1".into(),
            ts_us: ts,
            values: v,
            quality: vec![Quality::Good; n],
            counts: ReadCounts::default(),
        };
        TagTable::from_series(&s, 10, sampling)
    }

    #[test]
    fn default_models_follow_the_isa_letter() {
        assert_eq!(default_model("FT-3101A.PV").0.to_string(), "local-level+arma(1,0)");
        assert_eq!(default_model("PDT-3217.PV").0.to_string(), "local-level+arma(1,0)");
        assert_eq!(default_model("AT-3130.PV").0.to_string(), "local-level");
        assert!(default_model("XY-1").1.contains("unclassified"));
    }

    #[test]
    fn exception_tags_get_pseudo_observations_in_quiet_stretches() {
        let t = table(vec![0, 10, 50, 60], vec![1.0, 2.0, 3.0, f64::NAN], Sampling::Exception { deadband: 0.5 });
        let mut o = TagObs::build(&t, 4.0, |_| true, 1_000);
        assert_eq!(o.ts_us, [0, 10, 20, 30, 40, 50, 60]);
        assert_eq!(o.rows().collect::<Vec<_>>(), [Some(0), Some(1), None, None, None, Some(2), Some(3)]);
        assert_eq!(&o.y[2..5], &[2.0, 2.0, 2.0]);
        assert!(o.y[6].is_nan());
        o.set_noise(0.25);
        // w = 1 + 3 (0.5^2 / 3) / 0.25: three scans share the stretch.
        assert!((o.w[3] - (1.0 + 3.0 * 0.25 / 3.0 / 0.25)).abs() < 1e-12);
        assert_eq!(o.w[0], 1.0);
        // A regular tag's gap is not filled with pseudo-observations.
        let t = table(vec![0, 10, 50], vec![1.0, 2.0, 3.0], Sampling::Regular);
        let o = TagObs::build(&t, 4.0, |_| true, 1_000);
        assert_eq!(o.len(), 3);
        assert_eq!(o.dt[1], 4.0);
    }

    /// The regular tag's one-pass build gives the general loop's arrays:
    /// missing and unusable readings, uncertain quality, filled rows, gaps.
    #[test]
    fn the_regular_build_is_the_general_one() {
        let ts: Vec<i64> = (0..200).map(|i| if i < 120 { i * 10 } else { i * 10 + 300 }).collect();
        let v: Vec<f64> = (0..200).map(|i| if i % 17 == 3 { f64::NAN } else { f64::from(i) }).collect();
        let mut t = table(ts, v, Sampling::Regular);
        for i in (0..200).step_by(11) {
            t.quality[i] = Quality::Uncertain;
        }
        for i in [5, 6, 150] {
            t.status[i] = Status::Filled;
        }
        let use_row = |i: usize| i % 23 != 7;
        let fast = TagObs::build(&t, 4.0, use_row, 0);
        let general = TagObs::build_general(&t, 4.0, use_row, 0);
        assert_eq!(fast.y.len(), general.y.len());
        for (a, b) in fast.y.iter().zip(&general.y) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
        assert_eq!((&fast.dt, &fast.w, &fast.base_w), (&general.dt, &general.w, &general.base_w));
        let extra = |o: &TagObs| (0..o.len()).map(|k| o.extra(k)).collect::<Vec<_>>();
        assert_eq!((extra(&fast), &fast.ts_us), (extra(&general), &general.ts_us));
        assert!(fast.rows().eq(general.rows()));
        assert_eq!((fast.row(3), fast.row(200)), (Some(3), None));
        assert!(fast.y[150].is_nan() && fast.base_w[11] == 4.0 && fast.dt[119] == 31.0);
    }

    #[test]
    fn a_subsample_keeps_blocks_and_the_time_between_them() {
        let t = table((0..1000).map(|i| i * 10).collect(), (0..1000).map(f64::from).collect(), Sampling::Regular);
        let o = TagObs::build(&t, 4.0, |_| true, 0);
        assert!(o.subsample(2000, 8).is_none());
        let s = o.subsample(160, 8).unwrap();
        assert_eq!(s.len(), 160);
        // Blocks of 20 consecutive points, one per 125; the total time is kept
        // from the first kept point to the last.
        assert_eq!(s.dt[..19], [1.0; 19]);
        assert_eq!(s.dt[19], 106.0);
        assert_eq!(s.ts_us[20] - s.ts_us[19], 1060);
        let span: f64 = s.dt[..159].iter().sum();
        assert_eq!(span as i64 * 10, s.ts_us[159] - s.ts_us[0]);
    }

    #[test]
    fn fitted_model_round_trips_through_the_report() {
        let mut rng = crate::rng::Rng::new(3);
        let mut level = 10.0;
        let v: Vec<f64> = (0..400)
            .map(|_| {
                level += 0.1 * rng.normal();
                level + 0.3 * rng.normal()
            })
            .collect();
        let t = table((0..400).map(|i| i * 10).collect(), v, Sampling::Regular);
        let mut o = TagObs::build(&t, 4.0, |_| true, 0);
        let spec: ModelSpec = "local-level".parse().unwrap();
        let f = Fitted::fit(&spec, &mut o, None).unwrap();
        // Simulated with sigma2.obs = 0.09, sigma2.level = 0.01.
        assert!((f.obs_noise() - 0.09).abs() < 0.03, "{:?}", f.params);
        let mut rep = TagReport::default();
        f.to_report(&mut rep);
        let g = Fitted::from_report(&rep).unwrap();
        assert_eq!(g.params, f.params);
        let s = g.smooth(&o, false).unwrap();
        assert!(s.sd.iter().all(|&x| x > 0.0 && x < 0.3));
    }

    /// `n` readings at 10 µs of `level` plus an AR(1) wander with
    /// coefficient `phi` (innovation sd 0.2) and reading noise sd 0.1.
    fn wandering(seed: u64, n: usize, phi: f64, level: f64) -> (Vec<i64>, Vec<f64>) {
        let mut rng = crate::rng::Rng::new(seed);
        let mut x = 0.0;
        let v = (0..n)
            .map(|_| {
                x = phi * x + 0.2 * rng.normal();
                level + x + 0.1 * rng.normal()
            })
            .collect();
        ((0..n as i64).map(|i| i * 10).collect(), v)
    }

    /// A local level plus AR(1) with the given coefficient, its other
    /// parameters fixed.
    fn level_ar1(phi: f64) -> Fitted {
        let spec: ModelSpec = "local-level+arma(1,0)".parse().unwrap();
        let given = [("sigma2.obs", 0.01), ("sigma2.level", 1e-6), ("phi.1", phi), ("sigma2.arma", 0.04)];
        Fitted::given(&spec, &given.iter().map(|(k, v)| (k.to_string(), *v)).collect()).unwrap()
    }

    /// The signal a later step takes from the fault tests' smoother pass is
    /// bit for bit the one it would compute; any difference in model or
    /// observations computes it afresh.
    #[test]
    fn the_remembered_signal_is_the_computed_one() {
        let (mut ts, mut v) = wandering(5, 600, 0.98, 50.0);
        v[100] = f64::NAN;
        v[300] += 5.0;
        ts.drain(400..420); // a gap
        v.drain(400..420);
        let t = table(ts, v, Sampling::Regular);
        let mut o = TagObs::build(&t, 4.0, |i| i != 7, 0);
        let f = level_ar1(0.98);
        o.set_noise(f.obs_noise());
        let fresh = f.smooth(&o, false).unwrap();
        let same = |(m, s): (Vec<f64>, Vec<f64>)| {
            m.iter().map(|x| x.to_bits()).eq(fresh.mean.iter().map(|x| x.to_bits()))
                && s.iter().map(|x| x.to_bits()).eq(fresh.sd.iter().map(|x| x.to_bits()))
        };
        let remembered = || SIGNAL_MEMO.with(|m| !m.borrow().mean.is_empty());

        // The same observations: taken from the memo (which is then spent).
        f.smooth_with_outliers(&o, &o.y).unwrap();
        assert!(remembered());
        assert!(same(f.smooth_signal(&o).unwrap()));
        assert!(!remembered());
        // Spent: computed again, same result.
        assert!(same(f.smooth_signal(&o).unwrap()));

        // One reading left out of the tests' pass: not taken.
        let mut y = o.y.clone();
        y[300] = f64::NAN;
        f.smooth_with_outliers_of(&o, &y, &o.y).unwrap();
        assert!(same(f.smooth_signal(&o).unwrap()));
        assert!(remembered(), "a different pass is not taken");
        // Another parameter value or another variance multiplier: not taken.
        let mut g = f.clone();
        g.params[0] *= 1.0 + 1e-15;
        g.smooth_with_outliers(&o, &o.y).unwrap();
        assert!(same(f.smooth_signal(&o).unwrap()) && remembered());
        f.smooth_with_outliers(&o, &o.y).unwrap();
        let mut o2 = o.clone();
        o2.w[5] *= 2.0;
        assert!(!f
            .smooth_signal(&o2)
            .unwrap()
            .0
            .iter()
            .map(|x| x.to_bits())
            .eq(fresh.mean.iter().map(|x| x.to_bits())));
        assert!(remembered());
        assert!(same(f.smooth_signal(&o).unwrap()) && !remembered());
    }

    /// The table check takes the memo exactly when building the
    /// observations would have given the kept pass's: any reading, quality
    /// or time step that differs, another model, or another tag's table,
    /// and it is not taken.
    #[test]
    fn the_remembered_signal_is_taken_for_its_own_table_only() {
        let (mut ts, mut v) = wandering(6, 500, 0.97, 20.0);
        v[50] = f64::NAN;
        ts.drain(200..205); // a gap: a time step of 6 periods
        v.drain(200..205);
        let mut t = table(ts, v, Sampling::Regular);
        t.quality[77] = Quality::Uncertain;
        // A rejected reading (not used), uncertain too (its weight still counts).
        t.status[9] = Status::Rejected;
        t.quality[9] = Quality::Uncertain;
        let ok = |t: &TagTable| {
            let status = t.status.clone();
            move |i: usize| status[i] == Status::Ok
        };
        let use_row = ok(&t);
        let f = level_ar1(0.97);
        let mut o = TagObs::build(&t, 4.0, &use_row, 0);
        o.set_noise(f.obs_noise());
        let fresh = f.smooth(&o, false).unwrap();
        let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        let keep = || {
            f.smooth_with_outliers(&o, &o.y).unwrap();
        };

        // Its own table: the readings, signal and sd of a fresh pass.
        keep();
        let (y, mean, sd) = f.kept_signal_of_table(&t, 4.0).expect("taken");
        assert_eq!(bits(&y), bits(&o.y));
        assert_eq!((bits(&mean), bits(&sd)), (bits(&fresh.mean), bits(&fresh.sd)));
        assert!(f.kept_signal_of_table(&t, 4.0).is_none(), "spent");

        // Each difference alone: not taken (and the memo stays for a match).
        let mut changed: Vec<(&str, TagTable)> = Vec::new();
        let mut c = t.clone();
        c.raw[300] += 1e-12;
        changed.push(("a reading", c));
        let mut c = t.clone();
        c.quality[78] = Quality::Uncertain;
        changed.push(("a quality", c));
        let mut c = t.clone();
        c.ts_us[400] -= 1;
        changed.push(("a time", c));
        let mut c = t.clone();
        c.status[120] = Status::Filled;
        changed.push(("an inserted row", c));
        let mut c = t.clone();
        c.status[130] = Status::Rejected;
        changed.push(("another row left out", c));
        let mut c = t.clone();
        c.quality[9] = Quality::Good;
        changed.push(("the quality of a row left out", c));
        let mut c = t.clone();
        c.raw.pop();
        c.ts_us.pop();
        c.status.pop();
        c.quality.pop();
        changed.push(("one row fewer", c));
        let mut c = t.clone();
        c.sampling = Sampling::Exception { deadband: 0.1 };
        changed.push(("exception-reported", c));
        for (what, c) in &changed {
            keep();
            assert!(f.kept_signal_of_table(c, 4.0).is_none(), "{what}");
        }
        keep();
        assert!(f.kept_signal_of_table(&t, 2.0).is_none(), "another uncertain factor");
        let mut g = f.clone();
        g.params[2] = 0.96;
        assert!(g.kept_signal_of_table(&t, 4.0).is_none(), "another model");
        assert!(f.kept_signal_of_table(&t, 4.0).is_some(), "kept through the misses");
    }
}
