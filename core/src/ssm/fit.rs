//! Maximum-likelihood estimation from the prediction-error decomposition.
//!
//! The optimiser is a trust-region Newton method with a finite-difference
//! Hessian (`newton`), run from every starting point side by side, so that
//! each round's likelihood evaluations go to the filter together (for a
//! two-state model they run in lock-step, `lanes`). A run that stops short
//! (iterations out, a failed evaluation) is handed to argmin's BFGS with a
//! backtracking (Armijo) line search, gradients by central differences. The
//! optimisers see only unconstrained parameters u:
//!
//! - a variance is exp(u) (log-variance);
//! - an AR block is the image of u under the partial-autocorrelation map
//!   pacf = u / sqrt(1 + u^2) followed by the Durbin-Levinson recursion
//!   (Monahan 1984; Jones 1980), so every trial point is stationary;
//! - an MA block is the negative of that image, so every trial point is invertible.
//!
//! The scale is concentrated out (DK 2012 §2.10.2, §7.3; Harvey 1989, §3.4):
//! the first variance of the parameter vector is fixed at 1, the others are
//! ratios to it, and for given ratios the likelihood is maximised by
//! sigma2_hat = sum(v^2/F) / n. This removes one dimension from the search.
//!
//! Convergence is judged at the final point by the size of the gradient of
//! the log-likelihood per observation (max |g| <= `FitOptions::grad_tol`),
//! whatever the reason the optimiser stopped. A Newton run also ends when an
//! iteration gains less than 1e-5 in the log-likelihood and the next is
//! predicted to gain no more (a variance ratio running towards 0 or
//! infinity, where the likelihood approaches its bound slowly), or when it
//! cannot catch up with another start's run (see `newton::Ending`). If BFGS
//! fails or stops short, a Nelder-Mead search restarts it once. Standard errors come from a
//! central-difference Hessian of the full (not concentrated) log-likelihood
//! in the model's own parameters; they are `None` where the Hessian is not
//! negative definite (for example a variance estimated at zero).

use argmin::core::{CostFunction, Executor, Gradient, State};
use argmin::solver::linesearch::condition::ArmijoCondition;
use argmin::solver::linesearch::BacktrackingLineSearch;
use argmin::solver::neldermead::NelderMead;
use argmin::solver::quasinewton::BFGS;
use nalgebra::DMatrix;
use serde::Serialize;

use super::arma;
use super::filter::{filter, filter_validated, FilterOptions, FilterOutput, Path};
use super::model::Observations;
use super::spec::{ModelSpec, ParamKind};
use super::{Result, SsmError};

/// Bounds of a log-variance ratio: beyond exp(+-30) the ratio is numerically
/// zero or infinite for any data the filter can handle.
const LOG_RATIO_BOUND: f64 = 30.0;

/// Options of a fit.
#[derive(Debug, Clone, PartialEq)]
pub struct FitOptions {
    /// Largest number of BFGS iterations.
    pub max_iter: u64,
    /// Convergence: largest |d loglik / d u| per observation at the optimum.
    pub grad_tol: f64,
    /// Filter implementation.
    pub path: Path,
    /// Starting values in the model's parameters (None: chosen from the data).
    pub start: Option<Vec<f64>>,
    /// Compute standard errors (costs about 2k^2 likelihood evaluations).
    pub std_errors: bool,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions { max_iter: 200, grad_tol: 1e-6, path: Path::Auto, start: None, std_errors: true }
    }
}

/// Result of a maximum-likelihood fit.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FitResult {
    /// The model spec, normalised.
    pub model: String,
    /// Parameter names in order.
    pub param_names: Vec<String>,
    /// Estimates.
    pub params: Vec<f64>,
    /// Standard errors (None where the Hessian does not give one).
    pub std_errors: Vec<Option<f64>>,
    /// Maximised log-likelihood (diffuse convention, see `filter`).
    pub loglik: f64,
    /// AIC = -2 loglik + 2 (k + number of diffuse states) (DK 2012, §7.4, not divided by n).
    pub aic: f64,
    /// Time points.
    pub n: usize,
    /// Missing time points.
    pub n_missing: usize,
    /// Observations counted in the likelihood.
    pub nobs: usize,
    /// True if the gradient test passed at the estimate.
    pub converged: bool,
    /// Optimiser iterations (BFGS, plus Nelder-Mead when it was needed).
    pub iterations: u64,
    /// Largest |gradient| per observation at the estimate.
    pub max_gradient: f64,
    /// Likelihood evaluations.
    pub evaluations: u64,
}

/// Log-likelihood of the model at the given parameters.
pub fn loglik(spec: &ModelSpec, params: &[f64], obs: &Observations, path: Path) -> Result<f64> {
    let model = spec.build(params)?;
    Ok(filter(&model, obs, &FilterOptions { path, ..FilterOptions::loglik_only() })?.loglik)
}

/// The map between unconstrained optimiser variables and model parameters,
/// with the concentrated scale removed.
struct Transform {
    kinds: Vec<ParamKind>,
    /// Index of the concentrated scale parameter.
    scale: usize,
    /// (start, len) of AR and MA blocks.
    ar: Option<(usize, usize)>,
    ma: Option<(usize, usize)>,
}

impl Transform {
    fn new(spec: &ModelSpec) -> Option<Self> {
        let kinds: Vec<ParamKind> = spec.params().into_iter().map(|(_, k)| k).collect();
        let scale = kinds.iter().position(|k| *k == ParamKind::Variance)?;
        let block = |want: ParamKind| {
            let s = kinds.iter().position(|k| *k == want)?;
            Some((s, kinds.iter().filter(|k| **k == want).count()))
        };
        Some(Transform { scale, ar: block(ParamKind::Ar), ma: block(ParamKind::Ma), kinds })
    }

    /// Free dimension (all parameters but the scale).
    fn dim(&self) -> usize {
        self.kinds.len() - 1
    }

    /// u (free) -> parameters with the scale at 1.
    fn constrain(&self, u: &[f64], out: &mut [f64]) {
        let mut j = 0;
        for (i, kind) in self.kinds.iter().enumerate() {
            if i == self.scale {
                out[i] = 1.0;
                continue;
            }
            out[i] = match kind {
                ParamKind::Variance => u[j].clamp(-LOG_RATIO_BOUND, LOG_RATIO_BOUND).exp(),
                _ => u[j],
            };
            j += 1;
        }
        // The free index of parameter i is i - (i > scale); AR/MA blocks never contain the scale.
        let free = |i: usize| if i > self.scale { i - 1 } else { i };
        if let Some((s, len)) = self.ar {
            let uu: Vec<f64> = (s..s + len).map(|i| u[free(i)]).collect();
            arma::constrain_stationary(&uu, &mut out[s..s + len]);
        }
        if let Some((s, len)) = self.ma {
            let uu: Vec<f64> = (s..s + len).map(|i| u[free(i)]).collect();
            arma::constrain_invertible(&uu, &mut out[s..s + len]);
        }
    }

    /// Parameters -> u (free), dividing variances by the scale parameter.
    fn unconstrain(&self, params: &[f64]) -> Result<Vec<f64>> {
        let scale = params[self.scale].max(f64::MIN_POSITIVE);
        let mut u = Vec::with_capacity(self.dim());
        let ar_u = match self.ar {
            Some((s, len)) => arma::unconstrain_stationary(&params[s..s + len])?,
            None => vec![],
        };
        let ma_u = match self.ma {
            Some((s, len)) => arma::unconstrain_invertible(&params[s..s + len])?,
            None => vec![],
        };
        for (i, kind) in self.kinds.iter().enumerate() {
            if i == self.scale {
                continue;
            }
            u.push(match kind {
                ParamKind::Variance => (params[i] / scale).max(1e-300).ln().clamp(-LOG_RATIO_BOUND, LOG_RATIO_BOUND),
                ParamKind::Ar => ar_u[i - self.ar.map_or(0, |a| a.0)],
                ParamKind::Ma => ma_u[i - self.ma.map_or(0, |a| a.0)],
            });
        }
        Ok(u)
    }
}

/// The concentrated negative log-likelihood per observation as a function of u.
struct Problem<'a> {
    spec: &'a ModelSpec,
    tr: &'a Transform,
    obs: &'a Observations<'a>,
    path: Path,
    nobs: f64,
    evals: std::cell::Cell<u64>,
    /// Reused filter output (the data were validated once, up front).
    out: std::cell::RefCell<FilterOutput>,
    /// Evaluate through `lanes` (two states, one element, path not forced).
    lanes: bool,
}

impl Problem<'_> {
    fn value(&self, u: &[f64]) -> f64 {
        if self.lanes {
            let mut out = Vec::with_capacity(1);
            super::newton::Batch::values(self, &[u.to_vec()], &mut out);
            return out[0];
        }
        self.value_alone(u)
    }

    fn value_alone(&self, u: &[f64]) -> f64 {
        self.evals.set(self.evals.get() + 1);
        let mut params = vec![0.0; self.tr.kinds.len()];
        self.tr.constrain(u, &mut params);
        let Ok(model) = self.spec.build(&params) else {
            return 1e100;
        };
        let out = &mut *self.out.borrow_mut();
        filter_validated(&model, self.obs, &FilterOptions { path: self.path, ..FilterOptions::loglik_only() }, out);
        let ll = out.concentrated_loglik();
        if out.nobs > 0 && ll.is_finite() {
            -ll / self.nobs
        } else {
            1e100
        }
    }

    /// Central-difference gradient; its 2k points are evaluated together.
    fn grad(&self, u: &[f64]) -> Vec<f64> {
        let h: Vec<f64> = u.iter().map(|v| 1e-5 * v.abs().max(1.0)).collect();
        let mut points = Vec::with_capacity(2 * u.len());
        for i in 0..u.len() {
            for sign in [1.0, -1.0] {
                let mut x = u.to_vec();
                x[i] = u[i] + sign * h[i];
                points.push(x);
            }
        }
        let mut f = Vec::with_capacity(points.len());
        super::newton::Batch::values(self, &points, &mut f);
        (0..u.len()).map(|i| (f[2 * i] - f[2 * i + 1]) / (2.0 * h[i])).collect()
    }
}

impl super::newton::Batch for Problem<'_> {
    /// Values at several points: a two-state model (the common case: level
    /// plus AR(1), local trend, ARMA(2,0) or (1,1)) runs its filters in
    /// lock-step (see `lanes`); others one after the other.
    fn values(&self, points: &[Vec<f64>], out: &mut Vec<f64>) {
        out.clear();
        if !self.lanes {
            out.extend(points.iter().map(|u| self.value_alone(u)));
            return;
        }
        self.evals.set(self.evals.get() + points.len() as u64);
        let mut params = vec![0.0; self.tr.kinds.len()];
        let mut models = Vec::with_capacity(points.len());
        let mut built = Vec::with_capacity(points.len());
        for u in points {
            self.tr.constrain(u, &mut params);
            match self.spec.build(&params) {
                Ok(m) => {
                    built.push(true);
                    models.push(m);
                }
                Err(_) => built.push(false),
            }
        }
        let mut lls = Vec::with_capacity(models.len());
        super::lanes::concentrated_logliks(&models, self.obs, &mut self.out.borrow_mut(), &mut lls);
        let mut lls = lls.into_iter();
        for ok in built {
            let v = if ok { lls.next() } else { None };
            out.push(match v {
                Some((ll, nobs)) if nobs > 0 && ll.is_finite() => -ll / self.nobs,
                _ => 1e100,
            });
        }
    }
}

impl CostFunction for Problem<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, u: &Self::Param) -> std::result::Result<f64, argmin::core::Error> {
        Ok(self.value(u))
    }
}

impl Gradient for Problem<'_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, u: &Self::Param) -> std::result::Result<Vec<f64>, argmin::core::Error> {
        Ok(self.grad(u))
    }
}

fn run_bfgs(problem: &Problem, x0: Vec<f64>, max_iter: u64, grad_tol: f64) -> Option<(Vec<f64>, u64)> {
    let k = x0.len();
    let mut h0 = vec![vec![0.0; k]; k];
    for (i, row) in h0.iter_mut().enumerate() {
        row[i] = 1.0;
    }
    let linesearch = BacktrackingLineSearch::new(ArmijoCondition::new(1e-4).ok()?).rho(0.5).ok()?;
    let solver = BFGS::new(linesearch).with_tolerance_grad(grad_tol * 0.1).ok()?.with_tolerance_cost(1e-15).ok()?;
    let res = Executor::new(ProblemRef(problem), solver)
        .configure(|s| s.param(x0).inv_hessian(h0).max_iters(max_iter))
        .run()
        .ok()?;
    let state = res.state();
    Some((state.get_best_param()?.clone(), state.get_iter()))
}

fn run_nelder_mead(problem: &Problem, x0: &[f64], max_iter: u64) -> Option<(Vec<f64>, u64)> {
    let mut simplex = vec![x0.to_vec()];
    for i in 0..x0.len() {
        let mut x = x0.to_vec();
        x[i] += 0.5;
        simplex.push(x);
    }
    let solver = NelderMead::new(simplex).with_sd_tolerance(1e-12).ok()?;
    let res = Executor::new(ProblemRef(problem), solver).configure(|s| s.max_iters(max_iter * 5)).run().ok()?;
    let state = res.state();
    Some((state.get_best_param()?.clone(), state.get_iter()))
}

/// argmin takes its problem by value; this wrapper lends it the borrowed one.
struct ProblemRef<'a, 'b>(&'a Problem<'b>);

impl CostFunction for ProblemRef<'_, '_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, u: &Self::Param) -> std::result::Result<f64, argmin::core::Error> {
        Ok(self.0.value(u))
    }
}

impl Gradient for ProblemRef<'_, '_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, u: &Self::Param) -> std::result::Result<Vec<f64>, argmin::core::Error> {
        Ok(self.0.grad(u))
    }
}

/// Trust-region Newton from every start, side by side; a run that stops
/// short goes on with [`rescue`]. Returns the best point and the iterations.
fn optimise(problem: &Problem, starts: Vec<Vec<f64>>, opts: &FitOptions) -> (Vec<f64>, u64) {
    // Flat: iterations gaining less than 1e-5 in the log-likelihood.
    let f_tol = 1e-5 / problem.nobs;
    let runs = super::newton::minimise(problem, starts, opts.max_iter, opts.grad_tol * 0.1, f_tol);
    let mut best: Option<(f64, Vec<f64>)> = None;
    let mut iters = 0;
    for run in runs {
        iters += run.iterations;
        let (x, f) = if run.ending == super::newton::Ending::Stopped {
            let (x, it) = rescue(problem, run.x, opts);
            iters += it;
            let f = problem.value(&x);
            (x, f)
        } else {
            (run.x, run.f)
        };
        if best.as_ref().is_none_or(|b| f < b.0) {
            best = Some((f, x));
        }
    }
    let u = best.map(|b| b.1).unwrap_or_default();
    (u, iters)
}

/// BFGS from x0, and if that fails or stops with a large gradient, a
/// Nelder-Mead search followed by BFGS again; returns the better point.
fn rescue(problem: &Problem, x0: Vec<f64>, opts: &FitOptions) -> (Vec<f64>, u64) {
    let mut u = x0.clone();
    let mut iters = 0;
    if let Some((x, it)) = run_bfgs(problem, x0, opts.max_iter, opts.grad_tol) {
        if problem.value(&x) <= problem.value(&u) {
            u = x;
        }
        iters += it;
    }
    if max_abs(&problem.grad(&u)) > opts.grad_tol {
        if let Some((x, it)) = run_nelder_mead(problem, &u, opts.max_iter) {
            iters += it;
            let (x, it2) = run_bfgs(problem, x.clone(), opts.max_iter, opts.grad_tol).unwrap_or((x, 0));
            iters += it2;
            if problem.value(&x) <= problem.value(&u) {
                u = x;
            }
        }
    }
    (u, iters)
}

/// Summary of the observed values used to check data and choose start values.
struct DataSummary {
    n_obs: usize,
    first: f64,
    constant: bool,
}

fn summarise(obs: &Observations) -> DataSummary {
    let vals: Vec<f64> = obs.y.iter().copied().filter(|v| v.is_finite()).collect();
    let first = vals.first().copied().unwrap_or(f64::NAN);
    let constant = vals.iter().all(|v| *v == first);
    DataSummary { n_obs: vals.len(), first, constant }
}

/// Fits the model by maximum likelihood.
pub fn fit(spec: &ModelSpec, obs: &Observations, opts: &FitOptions) -> Result<FitResult> {
    obs.validate()?;
    let names = spec.param_names();
    let k = names.len();
    let summary = summarise(obs);
    if summary.n_obs == 0 {
        return Err(SsmError::AllMissing);
    }
    let n_diffuse = spec.n_diffuse();
    let needed = k + n_diffuse + 1;
    if summary.n_obs < needed {
        return Err(SsmError::TooShort { n_obs: summary.n_obs, n_params: k, n_diffuse, needed });
    }
    if summary.constant {
        return Err(SsmError::Constant { value: summary.first });
    }
    let tr = Transform::new(spec).ok_or_else(|| SsmError::NotFittable {
        model: spec.to_string(),
        reason: "it has no variance parameter".into(),
    })?;
    let problem = Problem {
        spec,
        tr: &tr,
        obs,
        path: opts.path,
        nobs: summary.n_obs as f64,
        evals: std::cell::Cell::new(0),
        out: Default::default(),
        lanes: obs.p == 1 && matches!(opts.path, Path::Auto | Path::Fixed) && spec.state_dim() == 2,
    };

    // Starting points: the given values, or a small grid. Variance ratios
    // from 1e-3 to 10 with AR/MA at zero; when AR terms share the model with
    // other variances (AR(1) plus noise is close to ARMA(1,1), so the
    // likelihood can have two basins) the first AR coefficient also starts
    // at pacf 0, 0.83 and 0.995 (u = 0, 1.5, 10; a process variable sampled
    // every second often has an AR coefficient near 1), and the best start of
    // each AR value is optimised. On 60 generated level + AR(1) tags, the
    // earlier 0, 0.71, 0.95 ended in a worse optimum on 5 and took 6% more
    // iterations.
    let starts: Vec<Vec<f64>> = match &opts.start {
        Some(s) => {
            spec.validate(s)?;
            vec![tr.unconstrain(s)?]
        }
        None => {
            let n_var = tr.kinds.iter().filter(|k| **k == ParamKind::Variance).count();
            let ratio_grid: &[f64] = if n_var > 1 { &[-6.9, -4.6, -2.3, 0.0, 2.3] } else { &[0.0] };
            let first_ar = tr.ar.map(|(s, _)| if s > tr.scale { s - 1 } else { s });
            let ar_grid: &[f64] = if n_var > 1 && first_ar.is_some() { &[0.0, 1.5, 10.0] } else { &[0.0] };
            let mut grid = Vec::new();
            for &ar0 in ar_grid {
                for &log_ratio in ratio_grid {
                    let mut u: Vec<f64> = (0..tr.kinds.len())
                        .filter(|&i| i != tr.scale)
                        .map(|i| if tr.kinds[i] == ParamKind::Variance { log_ratio } else { 0.0 })
                        .collect();
                    if let Some(j) = first_ar {
                        u[j] = ar0;
                    }
                    grid.push(u);
                }
            }
            let mut values = Vec::new();
            super::newton::Batch::values(&problem, &grid, &mut values);
            // The best start of each AR value (the first on ties).
            let mut picks = Vec::new();
            for (row, vals) in grid.chunks(ratio_grid.len()).zip(values.chunks(ratio_grid.len())) {
                let best = (0..row.len()).fold(0, |b, i| if vals[i] < vals[b] { i } else { b });
                picks.push(row[best].clone());
            }
            picks
        }
    };

    let (mut u, iterations) = if starts[0].is_empty() { (vec![], 0) } else { optimise(&problem, starts, opts) };
    for x in u.iter_mut() {
        if !x.is_finite() {
            *x = 0.0;
        }
    }
    let max_gradient = if u.is_empty() { 0.0 } else { max_abs(&problem.grad(&u)) };

    // Back to the model's parameters: scale the variances by sigma2_hat.
    let mut params = vec![0.0; k];
    tr.constrain(&u, &mut params);
    let model = spec.build(&params)?;
    let out = filter(&model, obs, &FilterOptions { path: opts.path, ..FilterOptions::loglik_only() })?;
    let scale = out.concentrated_scale();
    for (p, kind) in params.iter_mut().zip(&tr.kinds) {
        if *kind == ParamKind::Variance {
            *p *= scale;
        }
    }
    let loglik = loglik(spec, &params, obs, opts.path)?;
    let std_errors = if opts.std_errors { std_errors(spec, &params, obs, opts.path) } else { vec![None; k] };
    Ok(FitResult {
        model: spec.to_string(),
        param_names: names,
        params,
        std_errors,
        loglik,
        aic: -2.0 * loglik + 2.0 * (k + n_diffuse) as f64,
        n: obs.len(),
        n_missing: (0..obs.len()).filter(|&t| (0..obs.p).all(|i| obs.y[t * obs.p + i].is_nan())).count(),
        nobs: out.nobs,
        converged: max_gradient <= opts.grad_tol && loglik.is_finite(),
        iterations,
        max_gradient,
        evaluations: problem.evals.get(),
    })
}

fn max_abs(x: &[f64]) -> f64 {
    x.iter().fold(0.0, |m, v| if v.is_nan() { f64::INFINITY } else { m.max(v.abs()) })
}

/// Standard errors from the inverse of minus the numerical Hessian of the
/// log-likelihood in the model's parameters. A variance estimated at the
/// boundary (below 1e-6 of the largest variance) has no standard error: the
/// usual asymptotics do not hold there. It is held fixed while the
/// Hessian of the other parameters is taken.
fn std_errors(spec: &ModelSpec, params: &[f64], obs: &Observations, path: Path) -> Vec<Option<f64>> {
    let k = params.len();
    let kinds: Vec<ParamKind> = spec.params().into_iter().map(|(_, kind)| kind).collect();
    let max_var =
        params.iter().zip(&kinds).filter(|(_, k)| **k == ParamKind::Variance).fold(0.0f64, |m, (p, _)| m.max(*p));
    let free: Vec<usize> = (0..k).filter(|&i| kinds[i] != ParamKind::Variance || params[i] > 1e-6 * max_var).collect();
    let mut out = vec![None; k];
    let buf = std::cell::RefCell::new(FilterOutput::default());
    let f = |x: &[f64]| {
        let model = spec.build(x).ok()?;
        let out = &mut *buf.borrow_mut();
        filter_validated(&model, obs, &FilterOptions { path, ..FilterOptions::loglik_only() }, out);
        Some(out.loglik).filter(|v| v.is_finite())
    };
    let Some(f0) = f(params) else { return out };
    let h: Vec<f64> = params.iter().map(|p| 1e-4 * p.abs().max(1e-4)).collect();
    let nf = free.len();
    let mut hess = DMatrix::zeros(nf, nf);
    let mut fplus = vec![0.0; nf];
    let mut x = params.to_vec();
    // Diagonal: central second differences.
    for (a, &i) in free.iter().enumerate() {
        x[i] = params[i] + h[i];
        let fp = f(&x);
        x[i] = params[i] - h[i];
        let fm = f(&x);
        x[i] = params[i];
        let (Some(fp), Some(fm)) = (fp, fm) else { return out };
        fplus[a] = fp;
        hess[(a, a)] = (fp - 2.0 * f0 + fm) / (h[i] * h[i]);
    }
    // Off-diagonal: (f(x + h_i + h_j) - f(x + h_i) - f(x + h_j) + f(x)) / (h_i h_j),
    // one new evaluation per pair (error O(h), about 1e-4 relative here).
    for (a, &i) in free.iter().enumerate() {
        for (b, &j) in free.iter().enumerate().take(a) {
            x[i] = params[i] + h[i];
            x[j] = params[j] + h[j];
            let fij = f(&x);
            x[i] = params[i];
            x[j] = params[j];
            let Some(fij) = fij else { return out };
            let v = (fij - fplus[a] - fplus[b] + f0) / (h[i] * h[j]);
            hess[(a, b)] = v;
            hess[(b, a)] = v;
        }
    }
    let Some(chol) = (-hess).cholesky() else { return out };
    let cov = chol.inverse();
    for (a, &i) in free.iter().enumerate() {
        out[i] = Some(cov[(a, a)].sqrt()).filter(|v| v.is_finite());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    fn spec(s: &str) -> ModelSpec {
        s.parse().unwrap()
    }

    #[test]
    fn bad_data_gives_typed_errors() {
        let ll = spec("local-level");
        let fit1 = |y: &[f64]| fit(&ll, &Observations::univariate(y), &FitOptions::default());
        assert!(matches!(fit1(&[f64::NAN; 20]), Err(SsmError::AllMissing)));
        assert!(matches!(fit1(&[3.5; 20]), Err(SsmError::Constant { value }) if value == 3.5));
        assert!(matches!(fit1(&[1.0, 2.0, 1.5]), Err(SsmError::TooShort { n_obs: 3, needed: 4, .. })));
        assert!(matches!(
            fit1(&[1.0, f64::INFINITY, 2.0, 3.0, 1.0]),
            Err(SsmError::NonFiniteObservation { index: 1, .. })
        ));
        assert!(matches!(fit1(&[]), Err(SsmError::AllMissing)));
        // The first bad entry is the one named, past the vector width.
        let mut y: Vec<f64> = (0..40).map(|t| t as f64).collect();
        y[37] = f64::NEG_INFINITY;
        y[39] = f64::INFINITY;
        assert!(matches!(fit1(&y), Err(SsmError::NonFiniteObservation { index: 37, .. })));
        let mut dt = vec![1.0; 40];
        dt[23] = 0.0;
        dt[30] = f64::NAN;
        dt[39] = 0.0; // (the last step is never taken)
        fn with_dt<'a>(y: &'a [f64], dt: &'a [f64]) -> Observations<'a> {
            Observations { dt: Some(dt), ..Observations::univariate(y) }
        }
        assert!(matches!(with_dt(&y, &dt).validate(), Err(SsmError::NonFiniteObservation { index: 37, .. })));
        let y: Vec<f64> = (0..40).map(|t| t as f64).collect();
        assert!(matches!(with_dt(&y, &dt).validate(), Err(SsmError::BadTimeStep { index: 23, value }) if value == 0.0));
        dt[23] = 1.0;
        assert!(
            matches!(with_dt(&y, &dt).validate(), Err(SsmError::BadTimeStep { index: 30, value }) if value.is_nan())
        );
        dt[30] = 1.0;
        assert!(with_dt(&y, &dt).validate().is_ok());
        // A model with nothing to estimate.
        let c = spec("const");
        let y: Vec<f64> = (0..30).map(|t| t as f64).collect();
        assert!(matches!(
            fit(&c, &Observations::univariate(&y), &FitOptions::default()),
            Err(SsmError::NotFittable { .. })
        ));
        // Bad starting values are checked like any parameters.
        let opts = FitOptions { start: Some(vec![1.0, -1.0]), ..Default::default() };
        assert!(matches!(fit(&ll, &Observations::univariate(&y), &opts), Err(SsmError::NegativeVariance { .. })));
        let opts = FitOptions { start: Some(vec![0.9, 0.5, 1.0]), ..Default::default() };
        assert!(matches!(
            fit(&spec("arma(2,0)"), &Observations::univariate(&y), &opts),
            Err(SsmError::NonStationary { .. })
        ));
    }

    #[test]
    fn a_cut_short_optimiser_is_reported_not_hidden() {
        let mut rng = Rng::new(9);
        let (y, _) = arma::simulate(&[0.6, -0.2], &[0.3], 1.0, 400, &mut rng).unwrap();
        let opts = FitOptions { max_iter: 1, grad_tol: 1e-12, ..Default::default() };
        let res = fit(&spec("arma(2,1)"), &Observations::univariate(&y), &opts).unwrap();
        assert!(!res.converged, "{res:?}");
        assert!(res.params.iter().all(|p| p.is_finite()));
        assert!(res.loglik.is_finite());
        assert!(res.max_gradient > 1e-12);
    }

    #[test]
    fn recovers_a_known_model_and_reports_counts() {
        let mut rng = Rng::new(12);
        let mut level = 50.0;
        let mut y: Vec<f64> = (0..3000)
            .map(|_| {
                level += 0.2f64.sqrt() * rng.normal();
                level + 2.0f64.sqrt() * rng.normal()
            })
            .collect();
        for v in &mut y[100..150] {
            *v = f64::NAN;
        }
        let res = fit(&spec("local-level"), &Observations::univariate(&y), &FitOptions::default()).unwrap();
        assert!(res.converged);
        assert_eq!((res.n, res.n_missing, res.nobs), (3000, 50, 2949));
        // True values 2.0 and 0.2; standard errors from the Hessian cover them.
        for (est, (truth, se)) in res.params.iter().zip([2.0, 0.2].iter().zip(&res.std_errors)) {
            let se = se.unwrap();
            assert!((est - truth).abs() < 4.0 * se, "{est} vs {truth} (se {se})");
        }
        assert!((res.aic - (-2.0 * res.loglik + 2.0 * 3.0)).abs() < 1e-9);
    }

    /// Local level plus AR(1) has two basins (AR(1) plus noise is close to
    /// ARMA(1,1)); from a single start at phi = 0 the fit lands in the worse
    /// one on these seeds (found by search: 11 of 60 seeds did). The default
    /// starts must find the better one.
    #[test]
    fn mixed_model_finds_the_better_basin() {
        let s = spec("local-level+arma(1,0)");
        for seed in [9u64, 15, 19, 34, 52] {
            let mut rng = Rng::new(seed);
            let (ar, _) = arma::simulate(&[0.9], &[], 0.5, 300, &mut rng).unwrap();
            let mut level = 20.0;
            let y: Vec<f64> = ar
                .iter()
                .map(|x| {
                    level += 0.05 * rng.normal();
                    level + x + 0.3 * rng.normal()
                })
                .collect();
            let obs = Observations::univariate(&y);
            let free = fit(&s, &obs, &FitOptions::default()).unwrap();
            let from_truth =
                fit(&s, &obs, &FitOptions { start: Some(vec![0.09, 0.0025, 0.9, 0.5]), ..Default::default() }).unwrap();
            assert!(
                free.loglik >= from_truth.loglik - 1e-4,
                "seed {seed}: default starts {} < start at truth {}",
                free.loglik,
                from_truth.loglik
            );
            // The variances are sigma2.obs, sigma2.level and sigma2.arma (not phi.1).
            let max_var = [0, 1, 3].iter().map(|&i| free.params[i]).fold(0.0, f64::max);
            for (p, se) in free.params.iter().zip(&free.std_errors) {
                if *p < 1e-6 * max_var {
                    assert!(se.is_none(), "a boundary variance has no standard error");
                }
            }
        }
    }
}
