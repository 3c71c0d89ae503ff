//! The Kalman filter with missing observations and exact diffuse initialisation.
//!
//! Univariate treatment (Durbin & Koopman 2012, §6.4; Koopman & Durbin 2000):
//! the p elements of y_t are processed one at a time, so a partly missing y_t
//! simply skips its missing elements and no matrix is inverted. For element i
//! of time t, with z the i-th row of Z and P the current covariance:
//!
//! ```text
//! v = y_ti - z a - d_i            innovation (prediction error)
//! K = P z',  F = z K + h_i w_ti   (K is not divided by F)
//! a <- a + K v / F
//! P <- P - K K' / F
//! ```
//!
//! and after the last element the prediction a <- T a + c, P <- T P T' + RQR'.
//!
//! Exact diffuse initialisation (DK §5.2, univariate form §6.4.3): while the
//! diffuse part P_inf is non-zero, an element with F_inf = z P_inf z' > 0
//! updates
//!
//! ```text
//! a     <- a + K_inf v / F_inf
//! P*    <- P* + K_inf K_inf' F* / F_inf^2 - (K* K_inf' + K_inf K*') / F_inf
//! P_inf <- P_inf - K_inf K_inf' / F_inf
//! ```
//!
//! and an element with F_inf = 0 takes the ordinary update with P*.
//!
//! # Likelihood convention
//! The diffuse log-likelihood of DK (2012) §7.2.2, eq. (7.4), element-wise:
//!
//! ```text
//! log L = -N/2 log 2 pi - 1/2 sum_{diffuse} log F_inf - 1/2 sum_{regular} (log F + v^2 / F)
//! ```
//!
//! where N counts every observed element, "diffuse" the elements with
//! F_inf > 0 and "regular" the others. statsmodels uses the same convention
//! with exact diffuse initialisation. Missing elements contribute nothing, so
//! an all-missing stretch leaves the likelihood unchanged.
//!
//! # Numerical care
//! The downdate P - K K'/F is a symmetric rank-one update (bitwise symmetric);
//! after each prediction P is symmetrised and negative diagonal round-off is
//! set to zero, so covariances stay symmetric positive semi-definite.
//!
//! # Steady state
//! For p = 1, once the predicted covariance stops changing (relative change
//! below `FilterOptions::steady_tol`) on a stretch with one-period steps, no
//! missing value and unit H weight, the gain and F are frozen and only the
//! state is updated (DK §4.3.4). Any missing value, weight or step change
//! resumes the full recursion.

use nalgebra::{allocator::Allocator, Const, DMatrix, DVector, DefaultAllocator, Dim, Dyn, OMatrix, OVector, U1};

use super::model::{Observations, StateSpace};
use super::{scalar, Result};

pub(crate) const LN_2PI: f64 = 1.837_877_066_409_345_5;
/// F_inf below this counts as zero (P_inf is O(1) by construction).
pub(crate) const DIFFUSE_TOL: f64 = 1e-9;

/// A sum of logarithms taken in batches: the product of up to 16 terms,
/// then one `ln`, which for a small model costs as much as the rest of an
/// update. Terms outside 1e-100..1e100 are taken alone, and a product
/// leaving 1e-150..1e150 is flushed, so the product cannot overflow or
/// underflow; the result differs from the term-by-term sum by rounding only.
#[derive(Debug, Clone, Copy)]
pub(crate) struct LogSum {
    sum: f64,
    prod: f64,
    count: u32,
}

impl LogSum {
    pub(crate) fn new() -> Self {
        LogSum { sum: 0.0, prod: 1.0, count: 0 }
    }

    #[inline]
    pub(crate) fn add(&mut self, f: f64) {
        if !(1e-100..=1e100).contains(&f) {
            self.sum += f.ln();
            return;
        }
        self.prod *= f;
        self.count += 1;
        if self.count == 16 || !(1e-150..=1e150).contains(&self.prod) {
            self.flush();
        }
    }

    fn flush(&mut self) {
        if self.count > 0 {
            self.sum += self.prod.ln();
            self.prod = 1.0;
            self.count = 0;
        }
    }

    pub(crate) fn total(mut self) -> f64 {
        self.flush();
        self.sum
    }
}

/// Which implementation runs the recursions.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Path {
    /// Scalar for m = p = 1, fixed-size for m <= 4, general otherwise.
    #[default]
    Auto,
    /// Hand-written scalar code (m = 1, p = 1 only).
    Scalar,
    /// nalgebra fixed-size matrices (m <= 4; larger models fall back to general).
    Fixed,
    /// nalgebra dynamic matrices, preallocated.
    General,
}

/// Options of a filter run.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FilterOptions {
    /// Keep states, covariances, innovations and gains (needed by the smoother).
    pub store: bool,
    /// Relative change of the predicted covariance below which the
    /// recursion is treated as converged; 0 turns the shortcut off.
    pub steady_tol: f64,
    /// Implementation to use.
    pub path: Path,
    /// Sum log F for the log-likelihood. A pass whose stored states and
    /// innovations alone are read (the cleaning steps' passes) may leave it
    /// out: the two-state loop then skips its running sum of log F (a
    /// logarithm every few steps, about a tenth of its time), and `loglik`
    /// and `sum_log_f` are NaN. Everything else is the same, bit for bit.
    pub loglik: bool,
}

impl Default for FilterOptions {
    fn default() -> Self {
        FilterOptions { store: true, steady_tol: 1e-11, path: Path::Auto, loglik: true }
    }
}

impl FilterOptions {
    /// Likelihood only: nothing stored.
    pub fn loglik_only() -> Self {
        FilterOptions { store: false, ..Default::default() }
    }
}

/// What happened to one observation element.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u8)]
pub enum ElemKind {
    /// NaN: skipped.
    Missing = 0,
    /// Ordinary update; counted in the likelihood.
    Regular = 1,
    /// Diffuse update (F_inf > 0); not counted in the likelihood.
    Diffuse = 2,
    /// F = 0: the element carries no new information; skipped.
    Degenerate = 3,
}

/// Extra quantities of a diffuse update, kept for the smoother.
#[derive(Debug, Clone, PartialEq)]
pub struct DiffuseElem {
    pub t: usize,
    pub i: usize,
    pub f_inf: f64,
    pub k_inf: Vec<f64>,
}

/// Result of a filter run. Arrays are row-major by time: element (t, j) of an
/// n x m array is at `t * m + j`; m x m covariances are stored column-major
/// at `t * m * m`.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct FilterOutput {
    pub n: usize,
    pub p: usize,
    pub m: usize,
    /// Log-likelihood (see the module documentation for the convention).
    pub loglik: f64,
    /// Observed elements counted in the likelihood.
    pub nobs: usize,
    /// Observed elements used by diffuse updates (not counted).
    pub n_diffuse_obs: usize,
    /// First time index after the diffuse phase (0 if there was none).
    pub diffuse_end: usize,
    /// Sum of v^2 / F over the counted elements.
    pub sum_v2_f: f64,
    /// Sum of log F over the counted elements.
    pub sum_log_f: f64,
    /// Sum of log F_inf over the diffuse updates.
    pub sum_log_f_inf: f64,
    /// First time index at which the steady-state shortcut was in force.
    pub steady_from: Option<usize>,
    /// The implementation that ran.
    pub path: Path,
    /// a_t: predicted state given y_1..y_{t-1} (n x m). Stored runs only.
    pub a_pred: Vec<f64>,
    /// P*_t: finite part of the predicted covariance (n x m x m).
    pub p_pred: Vec<f64>,
    /// a_{t|t} (n x m).
    pub a_filt: Vec<f64>,
    /// P_{t|t}, finite part (n x m x m).
    pub p_filt: Vec<f64>,
    /// Innovations v (n x p); NaN where missing.
    pub v: Vec<f64>,
    /// Innovation variances F (F* for diffuse updates) (n x p).
    pub f: Vec<f64>,
    /// Gains K = P z' (K* for diffuse updates) (n x p x m).
    pub k: Vec<f64>,
    /// Element kinds (n x p).
    pub kind: Vec<ElemKind>,
    /// P_inf at each time of the diffuse phase (diffuse_end x m x m).
    pub p_inf_pred: Vec<f64>,
    /// Diffuse updates, in order.
    pub diffuse: Vec<DiffuseElem>,
    /// Set before a stored run to leave `a_filt` and `p_filt` empty: a
    /// caller that only smooths does not read them (6 of the 16 numbers a
    /// two-state run stores per time). Kept from run to run.
    pub skip_filtered: bool,
}

impl FilterOutput {
    /// Prepares the output for a run of n times, reusing the buffers'
    /// capacity (no new pages once they are large enough). Every stored
    /// entry is overwritten by the run, so stale values never leak.
    pub(crate) fn reset(&mut self, n: usize, p: usize, m: usize, store: bool, path: Path) {
        *self = FilterOutput {
            n,
            p,
            m,
            path,
            a_pred: std::mem::take(&mut self.a_pred),
            p_pred: std::mem::take(&mut self.p_pred),
            a_filt: std::mem::take(&mut self.a_filt),
            p_filt: std::mem::take(&mut self.p_filt),
            v: std::mem::take(&mut self.v),
            f: std::mem::take(&mut self.f),
            k: std::mem::take(&mut self.k),
            kind: std::mem::take(&mut self.kind),
            p_inf_pred: std::mem::take(&mut self.p_inf_pred),
            diffuse: std::mem::take(&mut self.diffuse),
            skip_filtered: self.skip_filtered,
            ..Default::default()
        };
        let (len_nm, len_nmm, len_np) = if store { (n * m, n * m * m, n * p) } else { (0, 0, 0) };
        let filtered = if self.skip_filtered { 0 } else { 1 };
        for (v, len) in [
            (&mut self.a_pred, len_nm),
            (&mut self.p_pred, len_nmm),
            (&mut self.a_filt, len_nm * filtered),
            (&mut self.p_filt, len_nmm * filtered),
            (&mut self.v, len_np),
            (&mut self.f, len_np),
            (&mut self.k, len_np * m),
        ] {
            v.resize(len, 0.0);
        }
        self.kind.resize(len_np, ElemKind::Missing);
        self.p_inf_pred.clear();
        self.diffuse.clear();
    }

    /// True if the filtered states and covariances are to be stored.
    pub(crate) fn keeps_filtered(&self, store: bool) -> bool {
        store && !self.skip_filtered
    }

    /// True if states and covariances were stored.
    pub fn is_stored(&self) -> bool {
        self.a_pred.len() == self.n * self.m && self.n > 0
    }

    /// Standardised innovation v / sqrt(F) of element (t, i); NaN unless the
    /// element was a regular (counted) update.
    pub fn standardised(&self, t: usize, i: usize) -> f64 {
        let j = t * self.p + i;
        if self.kind.get(j) == Some(&ElemKind::Regular) {
            self.v[j] / self.f[j].sqrt()
        } else {
            f64::NAN
        }
    }

    /// Maximum-likelihood scale when every variance of the model was divided
    /// by it: sigma2_hat = sum(v^2/F) / nobs (DK §2.10.2, §7.3).
    pub fn concentrated_scale(&self) -> f64 {
        self.sum_v2_f / self.nobs as f64
    }

    /// Log-likelihood with the scale concentrated out (F_inf does not scale):
    /// -N/2 log 2 pi - 1/2 sum log F_inf - nobs/2 (1 + log sigma2_hat) - 1/2 sum log F.
    pub fn concentrated_loglik(&self) -> f64 {
        concentrated_loglik_of(self.nobs, self.n_diffuse_obs, self.sum_v2_f, self.sum_log_f, self.sum_log_f_inf)
    }

    /// Assembles the log-likelihood from the accumulated sums; without
    /// `loglik` (see [`FilterOptions::loglik`]) it and the sum of log F are NaN.
    pub(crate) fn finish_loglik(&mut self, loglik: bool) {
        if !loglik {
            self.sum_log_f = f64::NAN;
            self.loglik = f64::NAN;
            return;
        }
        let n_all = (self.nobs + self.n_diffuse_obs) as f64;
        self.loglik = -0.5 * (n_all * LN_2PI + self.sum_log_f_inf + self.sum_log_f + self.sum_v2_f);
    }
}

/// Runs the Kalman filter. Errors on infinite observations or bad steps;
/// shapes must match (panics otherwise).
pub fn filter(model: &StateSpace, obs: &Observations, opts: &FilterOptions) -> Result<FilterOutput> {
    let mut out = FilterOutput::default();
    filter_into(model, obs, opts, &mut out)?;
    Ok(out)
}

/// [`filter`] into an existing output, reusing its buffers: a worker that
/// cleans many tags keeps one `FilterOutput` and pays for its pages once.
pub fn filter_into(model: &StateSpace, obs: &Observations, opts: &FilterOptions, out: &mut FilterOutput) -> Result<()> {
    obs.validate()?;
    filter_validated(model, obs, opts, out);
    Ok(())
}

/// [`filter_into`] for data already checked with [`Observations::validate`]
/// (the optimiser calls the filter hundreds of times on the same data).
pub(crate) fn filter_validated(model: &StateSpace, obs: &Observations, opts: &FilterOptions, out: &mut FilterOutput) {
    assert_eq!(obs.p, model.obs_dim(), "observations have p elements, the model expects another p");
    let m = model.state_dim();
    match resolve_path(opts.path, m, obs.p) {
        Path::Scalar => scalar::filter(model, obs, opts, out),
        Path::Fixed => match m {
            1 => run(Const::<1>, model, obs, opts, Path::Fixed, out),
            2 => run(Const::<2>, model, obs, opts, Path::Fixed, out),
            3 => run(Const::<3>, model, obs, opts, Path::Fixed, out),
            4 => run(Const::<4>, model, obs, opts, Path::Fixed, out),
            _ => run(Dyn(m), model, obs, opts, Path::General, out),
        },
        _ => run(Dyn(m), model, obs, opts, Path::General, out),
    }
}

/// The path that will actually run for a model of m states and p elements.
pub fn resolve_path(path: Path, m: usize, p: usize) -> Path {
    match path {
        Path::Auto if m == 1 && p == 1 => Path::Scalar,
        Path::Auto if m <= 4 => Path::Fixed,
        Path::Auto => Path::General,
        Path::Scalar if m == 1 && p == 1 => Path::Scalar,
        Path::Scalar | Path::Fixed if m <= 4 => Path::Fixed,
        _ => Path::General,
    }
}

pub(crate) fn omat<D: Dim>(dim: D, x: &DMatrix<f64>) -> OMatrix<f64, D, D>
where
    DefaultAllocator: Allocator<D, D>,
{
    OMatrix::<f64, D, D>::from_iterator_generic(dim, dim, x.iter().cloned())
}

pub(crate) fn ovec<D: Dim>(dim: D, x: impl Iterator<Item = f64>) -> OVector<f64, D>
where
    DefaultAllocator: Allocator<D>,
{
    OVector::<f64, D>::from_iterator_generic(dim, U1, x)
}

/// Largest diagonal element, without allocating.
#[inline]
fn max_diag<D: Dim>(p: &OMatrix<f64, D, D>) -> f64
where
    DefaultAllocator: Allocator<D, D>,
{
    (0..p.nrows()).fold(0.0, |m, i| m.max(p[(i, i)]))
}

/// Symmetrise and clear negative diagonal round-off.
pub(crate) fn tidy<D: Dim>(p: &mut OMatrix<f64, D, D>)
where
    DefaultAllocator: Allocator<D, D>,
{
    let m = p.nrows();
    for i in 0..m {
        for j in 0..i {
            let s = 0.5 * (p[(i, j)] + p[(j, i)]);
            p[(i, j)] = s;
            p[(j, i)] = s;
        }
        if p[(i, i)] < 0.0 {
            p[(i, i)] = 0.0;
        }
    }
}

fn run<D: Dim>(dim: D, model: &StateSpace, obs: &Observations, opts: &FilterOptions, path: Path, out: &mut FilterOutput)
where
    DefaultAllocator: Allocator<D, D> + Allocator<D>,
{
    run_until(dim, model, obs, opts, path, out, None);
}

/// Where a two-state filter stands when its ordinary recursion begins
/// (after the diffuse phase): what [`super::lanes`] needs to go on.
pub(crate) struct Handoff {
    /// Next time index.
    pub t: usize,
    pub a: [f64; 2],
    /// Predicted covariance [p00, p01, p11].
    pub p: [f64; 3],
    /// The system of the step from t - 1 (T and RQR' for `cur_dt`).
    pub sys: super::model::StepSystem,
    pub cur_dt: f64,
    /// log F of the regular updates so far.
    pub logs: LogSum,
}

/// Runs a two-state, one-element model (likelihood only) up to the start of
/// its ordinary recursion and returns the filter's state there, with the
/// sums so far in `out`; `None` when the run ended first (`out` then holds
/// the whole run).
pub(crate) fn two_state_handoff(model: &StateSpace, obs: &Observations, out: &mut FilterOutput) -> Option<Handoff> {
    assert!(model.state_dim() == 2 && obs.p == 1, "two_state_handoff needs m = 2, p = 1");
    let mut h = None;
    let opts = FilterOptions { path: Path::Fixed, ..FilterOptions::loglik_only() };
    run_until(Const::<2>, model, obs, &opts, Path::Fixed, out, Some(&mut h));
    h
}

fn run_until<D: Dim>(
    dim: D,
    model: &StateSpace,
    obs: &Observations,
    opts: &FilterOptions,
    path: Path,
    out: &mut FilterOutput,
    mut handoff: Option<&mut Option<Handoff>>,
) where
    DefaultAllocator: Allocator<D, D> + Allocator<D>,
{
    let m = model.state_dim();
    let p = obs.p;
    let n = obs.len();
    let store = opts.store;
    out.reset(n, p, m, store, path);
    let keep_filt = out.keeps_filtered(store);

    let zrows: Vec<OVector<f64, D>> = (0..p).map(|i| ovec(dim, model.z.row(i).iter().cloned())).collect();
    let c = ovec(dim, model.c.iter().cloned());
    let mut a = ovec(dim, model.a1.iter().cloned());
    let mut ps = omat(dim, &model.p1_star);
    let mut pi = omat(dim, &model.p1_inf);
    let mut diffuse = pi.amax() > 0.0;

    let mut sys = model.step_system();
    let mut tt = omat(dim, &sys.t);
    let mut ttr = tt.transpose();
    let mut rqr = omat(dim, &sys.rqr);
    let mut cur_dt = 1.0;

    let mut ks = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut ki = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut tmpv = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut tmp = OMatrix::<f64, D, D>::zeros_generic(dim, dim);
    let mut p_prev = OMatrix::<f64, D, D>::zeros_generic(dim, dim);

    // Steady-state cache (p == 1 only).
    let allow_steady = p == 1 && opts.steady_tol > 0.0;
    let mut steady = false;
    let mut st_k = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut st_f = 0.0;
    let mut st_logf = 0.0;
    let mut st_gain = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut st_b = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut st_e = OVector::<f64, D>::zeros_generic(dim, U1);
    let mut st_m = OMatrix::<f64, D, D>::zeros_generic(dim, dim);
    let mut st_pfilt = OMatrix::<f64, D, D>::zeros_generic(dim, dim);

    let mut logs = LogSum::new();
    // Freezes K, F and the filtered P at the converged predicted P.
    macro_rules! enter_steady {
        ($t:expr) => {
            steady = true;
            out.steady_from.get_or_insert($t);
            st_k.gemv(1.0, &ps, &zrows[0], 0.0);
            st_f = zrows[0].dot(&st_k) + model.h[0];
            st_logf = st_f.ln();
            st_gain.copy_from(&st_k);
            st_gain /= st_f;
            // Filtered covariance in the steady state: P - K K'/F.
            st_pfilt.copy_from(&ps);
            st_pfilt.ger(-1.0 / st_f, &st_k, &st_k, 1.0);
        };
    }
    // (The general path keeps the matrix code, as the reference the tests
    // compare with.)
    let two_states = m == 2 && p == 1 && path == Path::Fixed;
    let mut t = 0;
    while t < n {
        if two_states && !diffuse && !steady {
            if let Some(h) = handoff.take() {
                let ps = ps.as_slice();
                *h = Some(Handoff { t, a: [a[0], a[1]], p: [ps[0], 0.5 * (ps[1] + ps[2]), ps[3]], sys, cur_dt, logs });
                return;
            }
            // A sum of two one-state blocks (z = [1, 1]; T diagonal, which
            // the loop reads off each step system) runs a copy with those
            // entries known: the same arithmetic, since x * 1 = x and the
            // products with the zeros drop out, on a shorter chain of
            // dependent operations.
            let unit_z = zrows[0].iter().all(|&z| z == 1.0);
            let run = if unit_z { run_two_states::<true> } else { run_two_states::<false> };
            let (tn, converged) = run(
                model,
                obs,
                opts,
                TwoStateRefs {
                    a: a.as_mut_slice(),
                    p: ps.as_mut_slice(),
                    z: zrows[0].as_slice(),
                    c: c.as_slice(),
                    sys: &mut sys,
                    cur_dt: &mut cur_dt,
                    logs: &mut logs,
                    out: &mut *out,
                },
                t,
            );
            t = tn;
            tt.copy_from_slice(sys.t.as_slice());
            ttr.copy_from(&tt.transpose());
            rqr.copy_from_slice(sys.rqr.as_slice());
            if converged {
                enter_steady!(t);
            }
            if t == n {
                break;
            }
        }
        if steady {
            // Steady state (p = 1): K, F and P are fixed; only the state
            // moves, while the steps are plain (observed, unit weight, one period).
            let start = t;
            let mut sum_v2 = 0.0;
            let d0 = model.d[0];
            // a_{t+1} = T (a + g v) + c = M a + b y + e with M = T (I - g z'),
            // b = T g, e = c - b d: v no longer sits on the dependency chain.
            let (zs, gs) = (zrows[0].as_slice(), st_gain.as_slice());
            {
                let (ts, cs) = (tt.as_slice(), c.as_slice());
                let (bv, ev, mv) = (st_b.as_mut_slice(), st_e.as_mut_slice(), st_m.as_mut_slice());
                for i in 0..m {
                    bv[i] = (0..m).map(|j| ts[j * m + i] * gs[j]).sum::<f64>();
                    ev[i] = cs[i] - bv[i] * d0;
                    for j in 0..m {
                        mv[j * m + i] = ts[j * m + i] - bv[i] * zs[j];
                    }
                }
            }
            let (bv, ev, mv) = (st_b.as_slice(), st_e.as_slice(), st_m.as_slice());
            while t < n {
                let y = obs.y[t];
                if y.is_nan() || obs.weight(t, 0) != 1.0 || obs.step(t) != 1.0 {
                    break;
                }
                // Plain slices and element loops: for small dynamic m this
                // avoids per-call overhead (a copy of two numbers is a libc call).
                let av = a.as_mut_slice();
                let v = y - zs.iter().zip(av.iter()).map(|(z, a)| z * a).sum::<f64>() - d0;
                if keep_filt {
                    for ((o, aj), gj) in out.a_filt[t * m..(t + 1) * m].iter_mut().zip(av.iter()).zip(gs) {
                        *o = aj + gj * v;
                    }
                    out.p_filt[t * m * m..(t + 1) * m * m].copy_from_slice(st_pfilt.as_slice());
                }
                if store {
                    out.a_pred[t * m..(t + 1) * m].copy_from_slice(av);
                    out.p_pred[t * m * m..(t + 1) * m * m].copy_from_slice(ps.as_slice());
                    out.v[t] = v;
                    out.f[t] = st_f;
                    out.k[t * m..(t + 1) * m].copy_from_slice(st_k.as_slice());
                    out.kind[t] = ElemKind::Regular;
                }
                let tv = tmpv.as_mut_slice();
                for (i, ti) in tv.iter_mut().enumerate() {
                    let mut acc = ev[i] + bv[i] * y;
                    for (j, aj) in av.iter().enumerate() {
                        acc += mv[j * m + i] * aj;
                    }
                    *ti = acc;
                }
                for (aj, tj) in av.iter_mut().zip(tv.iter()) {
                    *aj = *tj;
                }
                sum_v2 += v * v;
                t += 1;
            }
            let count = t - start;
            out.sum_v2_f += sum_v2 / st_f;
            out.sum_log_f += count as f64 * st_logf;
            out.nobs += count;
            if t == n {
                break;
            }
        }
        if store {
            out.a_pred[t * m..(t + 1) * m].copy_from_slice(a.as_slice());
            out.p_pred[t * m * m..(t + 1) * m * m].copy_from_slice(ps.as_slice());
            if diffuse {
                out.p_inf_pred.extend_from_slice(pi.as_slice());
            }
        }
        // The steady shortcut holds only for a plain step.
        if steady && (obs.y[t * p].is_nan() || obs.weight(t, 0) != 1.0) {
            steady = false;
        }
        let mut plain = !diffuse;
        let was_steady = steady;
        if !steady && allow_steady {
            p_prev.copy_from(&ps);
        }
        for (i, z) in zrows.iter().enumerate() {
            let j = t * p + i;
            let y = obs.y[j];
            if y.is_nan() {
                plain = false;
                if store {
                    out.v[j] = f64::NAN;
                    out.f[j] = f64::NAN;
                    out.k[j * m..(j + 1) * m].fill(0.0);
                    out.kind[j] = ElemKind::Missing;
                }
                continue;
            }
            let w = obs.weight(t, i);
            if w != 1.0 {
                plain = false;
            }
            let h = model.h[i] * w;
            let v = y - z.dot(&a) - model.d[i];
            let f = if steady {
                ks.copy_from(&st_k);
                st_f
            } else {
                ks.gemv(1.0, &ps, z, 0.0);
                z.dot(&ks) + h
            };
            if diffuse {
                ki.gemv(1.0, &pi, z, 0.0);
                let fi = z.dot(&ki);
                if fi > DIFFUSE_TOL {
                    a.axpy(v / fi, &ki, 1.0);
                    ps.ger(f / (fi * fi), &ki, &ki, 1.0);
                    ps.ger(-1.0 / fi, &ks, &ki, 1.0);
                    ps.ger(-1.0 / fi, &ki, &ks, 1.0);
                    tidy(&mut ps);
                    pi.ger(-1.0 / fi, &ki, &ki, 1.0);
                    tidy(&mut pi);
                    out.n_diffuse_obs += 1;
                    out.sum_log_f_inf += fi.ln();
                    if store {
                        out.v[j] = v;
                        out.f[j] = f;
                        out.k[j * m..(j + 1) * m].copy_from_slice(ks.as_slice());
                        out.kind[j] = ElemKind::Diffuse;
                        out.diffuse.push(DiffuseElem { t, i, f_inf: fi, k_inf: ki.as_slice().to_vec() });
                    }
                    continue;
                }
            }
            if f.is_nan() || f <= 1e-13 * (h + max_diag(&ps)).max(f64::MIN_POSITIVE) {
                if store {
                    out.v[j] = v;
                    out.f[j] = f;
                    out.k[j * m..(j + 1) * m].fill(0.0);
                    out.kind[j] = ElemKind::Degenerate;
                }
                continue;
            }
            a.axpy(v / f, &ks, 1.0);
            if !steady {
                ps.ger(-1.0 / f, &ks, &ks, 1.0);
            }
            out.sum_v2_f += v * v / f;
            if steady {
                out.sum_log_f += st_logf;
            } else {
                logs.add(f);
            }
            out.nobs += 1;
            if store {
                out.v[j] = v;
                out.f[j] = f;
                out.k[j * m..(j + 1) * m].copy_from_slice(ks.as_slice());
                out.kind[j] = ElemKind::Regular;
            }
        }
        if diffuse && pi.amax() <= DIFFUSE_TOL {
            diffuse = false;
            pi.fill(0.0);
            out.diffuse_end = t + 1;
        }
        if keep_filt {
            out.a_filt[t * m..(t + 1) * m].copy_from_slice(a.as_slice());
            let pf = if steady { &st_pfilt } else { &ps };
            out.p_filt[t * m * m..(t + 1) * m * m].copy_from_slice(pf.as_slice());
        }
        // Prediction.
        let dt = obs.step(t);
        if dt != cur_dt {
            model.system_for_step(dt, &mut sys);
            tt.copy_from_slice(sys.t.as_slice());
            ttr.copy_from(&tt.transpose());
            rqr.copy_from_slice(sys.rqr.as_slice());
            cur_dt = dt;
            steady = false;
            plain = false;
        }
        tmpv.gemv(1.0, &tt, &a, 0.0);
        a.copy_from(&tmpv);
        a += &c;
        t += 1;
        if steady {
            continue; // ps already holds the steady predicted covariance
        }
        if was_steady {
            // The update ran in steady mode (ps still holds the predicted
            // covariance); the prediction must start from the filtered one.
            ps.copy_from(&st_pfilt);
        }
        let check_steady = allow_steady && plain && dt == 1.0;
        tmp.gemm(1.0, &tt, &ps, 0.0);
        ps.gemm(1.0, &tmp, &ttr, 0.0);
        ps += &rqr;
        tidy(&mut ps);
        if diffuse {
            tmp.gemm(1.0, &tt, &pi, 0.0);
            pi.gemm(1.0, &tmp, &ttr, 0.0);
            tidy(&mut pi);
        }
        if check_steady {
            let scale = ps.amax().max(f64::MIN_POSITIVE);
            p_prev -= &ps;
            if p_prev.amax() <= opts.steady_tol * scale {
                enter_steady!(t);
            }
        }
    }
    if diffuse {
        out.diffuse_end = n;
    }
    out.sum_log_f += logs.total();
    out.finish_loglik(opts.loglik);
}

/// [`FilterOutput::concentrated_loglik`] from the sums themselves.
pub(crate) fn concentrated_loglik_of(
    nobs: usize,
    n_diffuse_obs: usize,
    sum_v2_f: f64,
    sum_log_f: f64,
    sum_log_f_inf: f64,
) -> f64 {
    let n_all = (nobs + n_diffuse_obs) as f64;
    let n = nobs as f64;
    -0.5 * (n_all * LN_2PI + sum_log_f_inf + n * (1.0 + (sum_v2_f / n).ln()) + sum_log_f)
}

/// (t00, t10, t01, t11, q00, q01, q11) of a two-state step system: T
/// column by column and RQR' as its three distinct entries.
pub(crate) fn two_state_system(sys: &super::model::StepSystem) -> [f64; 7] {
    let (t, q) = (sys.t.as_slice(), sys.rqr.as_slice());
    [t[0], t[1], t[2], t[3], q[0], 0.5 * (q[1] + q[2]), q[3]]
}

/// The shape of a two-state transition T, which the two-state loops of the
/// filter and the smoother take once per step system (not per time): with a
/// diagonal T the products with its zeros drop out, and with a random-walk
/// level (T00 = 1) the multiplications by one too: the same arithmetic on a
/// shorter chain of dependent operations.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum TwoStateShape {
    /// Diagonal with T00 = 1.
    RandomWalkLevel,
    Diagonal,
    Full,
}

impl TwoStateShape {
    /// The shape of T with entries t00, t01 (row 0, column 1) and t10.
    pub(crate) fn of(t00: f64, t01: f64, t10: f64) -> Self {
        match (t01 == 0.0 && t10 == 0.0, t00 == 1.0) {
            (true, true) => TwoStateShape::RandomWalkLevel,
            (true, false) => TwoStateShape::Diagonal,
            (false, _) => TwoStateShape::Full,
        }
    }

    /// T x for T = [t00, t10, t01, t11] (column by column) of this shape,
    /// without the products that the shape makes zero or one.
    #[inline]
    pub(crate) fn times(self, [t00, t10, t01, t11]: [f64; 4], [x0, x1]: [f64; 2]) -> [f64; 2] {
        match self {
            TwoStateShape::RandomWalkLevel => [x0, t11 * x1],
            TwoStateShape::Diagonal => [t00 * x0, t11 * x1],
            TwoStateShape::Full => [t00 * x0 + t01 * x1, t10 * x0 + t11 * x1],
        }
    }
}

/// A S A' for a 2 x 2 matrix A = [a00, a01, a10, a11] (row by row) and a
/// symmetric S = [s00, s01, s11]; returns the same three entries.
#[inline]
pub fn congruence2(a: [f64; 4], s: [f64; 3]) -> [f64; 3] {
    let [a00, a01, a10, a11] = a;
    let [s00, s01, s11] = s;
    let m00 = a00 * s00 + a01 * s01;
    let m01 = a00 * s01 + a01 * s11;
    let m10 = a10 * s00 + a11 * s01;
    let m11 = a10 * s01 + a11 * s11;
    [m00 * a00 + m01 * a01, m00 * a10 + m01 * a11, m10 * a10 + m11 * a11]
}

/// A variance with negative round-off cleared (NaN is left alone, as in [`tidy`]).
#[inline]
pub(crate) fn clear_negative(x: f64) -> f64 {
    if x < 0.0 {
        0.0
    } else {
        x
    }
}

/// The mutable state [`run_two_states`] works on.
struct TwoStateRefs<'a> {
    /// State (2).
    a: &'a mut [f64],
    /// Predicted covariance (2 x 2, column-major).
    p: &'a mut [f64],
    z: &'a [f64],
    c: &'a [f64],
    sys: &'a mut super::model::StepSystem,
    cur_dt: &'a mut f64,
    logs: &'a mut LogSum,
    out: &'a mut FilterOutput,
}

/// The ordinary (non-diffuse, not yet steady) recursion of a two-state,
/// one-element model on plain numbers: the updates of the general loop,
/// with the symmetric P held as three numbers and the update folded into
/// the prediction (P' = T P T' + Q - (T K)(T K)'/F), which shortens the
/// chain of dependent operations from one P to the next that bounds its
/// speed; the results agree with the general loop's to rounding (the tests
/// hold them to 1e-9). Runs from `t` until the end
/// or until the predicted covariance has converged (the general loop's
/// test); returns the next time index and whether it converged.
fn run_two_states<const UNIT_Z: bool>(
    model: &StateSpace,
    obs: &Observations,
    opts: &FilterOptions,
    s: TwoStateRefs,
    t0: usize,
) -> (usize, bool) {
    let TwoStateRefs { a, p, z, c, sys, cur_dt, logs, out } = s;
    let n = obs.len();
    let store = opts.store;
    let keep_filt = out.keeps_filtered(store);
    let allow_steady = opts.steady_tol > 0.0;
    let sum_logs = opts.loglik;
    let (z0, z1, d0, h0) = (z[0], z[1], model.d[0], model.h[0]);
    let (c0, c1) = (c[0], c[1]);
    let (mut a0, mut a1) = (a[0], a[1]);
    let (mut p00, mut p01, mut p11) = (p[0], 0.5 * (p[1] + p[2]), p[3]);
    let [mut t00, mut t10, mut t01, mut t11, mut q00, mut q01, mut q11] = two_state_system(sys);
    let mut shape = TwoStateShape::of(t00, t01, t10);
    let (mut sum_v2_f, mut nobs) = (0.0, 0usize);
    // z P z' for the predicted P, summed in two independent pairs (with
    // unit loadings p00 + 2 p01 + p11; the general form reduces to the same
    // operations at z = [1, 1]).
    let zpz = |p00: f64, p01: f64, p11: f64| {
        if UNIT_Z {
            (p00 + p11) + (p01 + p01)
        } else {
            let c = z0 * z1 * p01;
            (z0 * z0 * p00 + z1 * z1 * p11) + (c + c)
        }
    };
    let h_at = |t: usize| if t < n { h0 * obs.weight(t, 0) } else { h0 };
    // F at time t, z P z' + h, prepared by the step before (below).
    let mut f_next = zpz(p00, p01, p11) + h_at(t0);
    let mut t = t0;
    let mut converged = false;
    while t < n {
        if store {
            out.a_pred[2 * t] = a0;
            out.a_pred[2 * t + 1] = a1;
            out.p_pred[4 * t..4 * t + 4].copy_from_slice(&[p00, p01, p01, p11]);
        }
        let (q_prev00, q_prev01, q_prev11) = (p00, p01, p11);
        let mut plain = true;
        // The step to t + 1.
        let dt = obs.step(t);
        if dt != *cur_dt {
            model.system_for_step(dt, sys);
            [t00, t10, t01, t11, q00, q01, q11] = two_state_system(sys);
            shape = TwoStateShape::of(t00, t01, t10);
            *cur_dt = dt;
            plain = false;
        }
        // K = P z' and, ahead of the reading, the prediction without it
        // (T a + c, T P T' + Q) and the image of the gain g = T K. The
        // update then folds into the prediction:
        //   a' = (T a + c) + g v/F,   P' = (T P T' + Q) - g g'/F,
        // so after 1/F only one product and one subtraction stand between
        // this P and the next (the chain from one P to the next is what the
        // loop's speed is bound by).
        let (k0, k1) = if UNIT_Z { (p00 + p01, p01 + p11) } else { (p00 * z0 + p01 * z1, p01 * z0 + p11 * z1) };
        // (The general loading takes the full products whatever the shape.)
        let shape = if UNIT_Z { shape } else { TwoStateShape::Full };
        let tm = [t00, t10, t01, t11];
        let [ta0, ta1] = shape.times(tm, [a0, a1]);
        let (ta0, ta1) = (ta0 + c0, ta1 + c1);
        let [g0, g1] = shape.times(tm, [k0, k1]);
        let [c00, c01, c11] = match shape {
            TwoStateShape::RandomWalkLevel => [p00 + q00, p01 * t11 + q01, (t11 * p11) * t11 + q11],
            TwoStateShape::Diagonal => [(t00 * p00) * t00 + q00, (t00 * p01) * t11 + q01, (t11 * p11) * t11 + q11],
            TwoStateShape::Full => {
                let [s00, s01, s11] = congruence2([t00, t01, t10, t11], [p00, p01, p11]);
                [s00 + q00, s01 + q01, s11 + q11]
            }
        };
        // The next F without this reading's update, z (T P T' + Q) z' +
        // h_{t+1}, and the image of the gain on it, z g: with the update the
        // next F is that minus (z g)^2/F, one product and one subtraction
        // after 1/F, so the chain from one 1/F to the next does not pass
        // through P.
        let f_plain = zpz(c00, c01, c11) + h_at(t + 1);
        let zg = if UNIT_Z { g0 + g1 } else { z0 * g0 + z1 * g1 };
        let f = f_next;
        f_next = f_plain;
        let y = obs.y[t];
        // The filtered state and covariance when kept: the predicted ones
        // unless the reading updates them (below).
        let (mut fa, mut fp) = ([a0, a1], [p00, p01, p11]);
        if y.is_nan() {
            plain = false;
            if store {
                out.v[t] = f64::NAN;
                out.f[t] = f64::NAN;
                out.k[2 * t] = 0.0;
                out.k[2 * t + 1] = 0.0;
                out.kind[t] = ElemKind::Missing;
            }
            (a0, a1, p00, p01, p11) = (ta0, ta1, c00, c01, c11);
        } else {
            let w = obs.weight(t, 0);
            if w != 1.0 {
                plain = false;
            }
            let h = h0 * w;
            let v = if UNIT_Z { (y - d0) - (a0 + a1) } else { (y - d0) - (z0 * a0 + z1 * a1) };
            if f.is_nan() || f <= 1e-13 * (h + 0f64.max(p00).max(p11)).max(f64::MIN_POSITIVE) {
                if store {
                    out.v[t] = v;
                    out.f[t] = f;
                    out.k[2 * t] = 0.0;
                    out.k[2 * t + 1] = 0.0;
                    out.kind[t] = ElemKind::Degenerate;
                }
                (a0, a1, p00, p01, p11) = (ta0, ta1, c00, c01, c11);
            } else {
                let finv = 1.0 / f;
                let e = v * finv;
                if keep_filt {
                    fa = [a0 + k0 * e, a1 + k1 * e];
                    fp = [p00 - (k0 * k0) * finv, p01 - (k0 * k1) * finv, p11 - (k1 * k1) * finv];
                }
                a0 = ta0 + g0 * e;
                a1 = ta1 + g1 * e;
                p00 = c00 - (g0 * g0) * finv;
                p01 = c01 - (g0 * g1) * finv;
                p11 = c11 - (g1 * g1) * finv;
                f_next = f_plain - (zg * zg) * finv;
                sum_v2_f += v * e;
                if sum_logs {
                    logs.add(f);
                }
                nobs += 1;
                if store {
                    out.v[t] = v;
                    out.f[t] = f;
                    out.k[2 * t] = k0;
                    out.k[2 * t + 1] = k1;
                    out.kind[t] = ElemKind::Regular;
                }
            }
        }
        if keep_filt {
            out.a_filt[2 * t..2 * t + 2].copy_from_slice(&fa);
            out.p_filt[4 * t..4 * t + 4].copy_from_slice(&[fp[0], fp[1], fp[1], fp[2]]);
        }
        if p00 < 0.0 || p11 < 0.0 {
            // Round-off below zero is cleared, and F taken from the cleared P.
            p00 = clear_negative(p00);
            p11 = clear_negative(p11);
            f_next = zpz(p00, p01, p11) + h_at(t + 1);
        }
        t += 1;
        if allow_steady && plain && dt == 1.0 {
            let scale = p00.abs().max(p01.abs()).max(p11.abs()).max(f64::MIN_POSITIVE);
            let change = (q_prev00 - p00).abs().max((q_prev01 - p01).abs()).max((q_prev11 - p11).abs());
            if change <= opts.steady_tol * scale {
                converged = true;
                break;
            }
        }
    }
    a[0] = a0;
    a[1] = a1;
    p.copy_from_slice(&[p00, p01, p01, p11]);
    out.sum_v2_f += sum_v2_f;
    out.nobs += nobs;
    (t, converged)
}

/// Copies a stored m x m block into a dynamic matrix (for callers outside the hot loop).
pub fn stored_matrix(data: &[f64], t: usize, m: usize) -> DMatrix<f64> {
    DMatrix::from_column_slice(m, m, &data[t * m * m..(t + 1) * m * m])
}

/// Copies a stored m-vector.
pub fn stored_vector(data: &[f64], t: usize, m: usize) -> DVector<f64> {
    DVector::from_column_slice(&data[t * m..(t + 1) * m])
}
