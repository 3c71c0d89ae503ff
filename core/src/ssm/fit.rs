//! Maximum-likelihood estimation from the prediction-error decomposition.
//!
//! The optimiser (argmin's BFGS with a More-Thuente line search, gradients by
//! central differences) sees only unconstrained parameters u:
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
//! whatever the reason the optimiser stopped. If BFGS fails or stops short,
//! a Nelder-Mead search restarts it once. Standard errors come from a
//! central-difference Hessian of the full (not concentrated) log-likelihood
//! in the model's own parameters; they are `None` where the Hessian is not
//! negative definite (for example a variance estimated at zero).

use argmin::core::{CostFunction, Executor, Gradient, State};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::neldermead::NelderMead;
use argmin::solver::quasinewton::BFGS;
use nalgebra::DMatrix;
use serde::Serialize;

use super::arma;
use super::filter::{filter, FilterOptions, Path};
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
}

impl Problem<'_> {
    fn value(&self, u: &[f64]) -> f64 {
        self.evals.set(self.evals.get() + 1);
        let mut params = vec![0.0; self.tr.kinds.len()];
        self.tr.constrain(u, &mut params);
        let Ok(model) = self.spec.build(&params) else {
            return 1e100;
        };
        match filter(&model, self.obs, &FilterOptions { path: self.path, ..FilterOptions::loglik_only() }) {
            Ok(out) if out.nobs > 0 => {
                let ll = out.concentrated_loglik();
                if ll.is_finite() {
                    -ll / self.nobs
                } else {
                    1e100
                }
            }
            _ => 1e100,
        }
    }

    fn grad(&self, u: &[f64]) -> Vec<f64> {
        let mut g = vec![0.0; u.len()];
        let mut x = u.to_vec();
        for i in 0..u.len() {
            let h = 1e-5 * u[i].abs().max(1.0);
            x[i] = u[i] + h;
            let fp = self.value(&x);
            x[i] = u[i] - h;
            let fm = self.value(&x);
            x[i] = u[i];
            g[i] = (fp - fm) / (2.0 * h);
        }
        g
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
    let solver = BFGS::new(MoreThuenteLineSearch::new())
        .with_tolerance_grad(grad_tol * 0.1)
        .ok()?
        .with_tolerance_cost(1e-15)
        .ok()?;
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
    if summary.constant {
        return Err(SsmError::Constant { value: summary.first });
    }
    let n_diffuse = spec.n_diffuse();
    let needed = k + n_diffuse + 1;
    if summary.n_obs < needed {
        return Err(SsmError::TooShort { n_obs: summary.n_obs, n_params: k, n_diffuse, needed });
    }
    let tr = Transform::new(spec).ok_or_else(|| SsmError::NotFittable {
        model: spec.to_string(),
        reason: "it has no variance parameter".into(),
    })?;
    let problem =
        Problem { spec, tr: &tr, obs, path: opts.path, nobs: summary.n_obs as f64, evals: std::cell::Cell::new(0) };

    // Start: given values, or the best of a few variance ratios with AR/MA at zero.
    let x0 = match &opts.start {
        Some(s) => {
            spec.validate(s)?;
            tr.unconstrain(s)?
        }
        None => {
            let mut best = (f64::INFINITY, vec![0.0; tr.dim()]);
            let has_ratio = tr.kinds.iter().filter(|k| **k == ParamKind::Variance).count() > 1;
            let grid: &[f64] = if has_ratio { &[-6.9, -4.6, -2.3, 0.0, 2.3] } else { &[0.0] };
            for &log_ratio in grid {
                let u: Vec<f64> = (0..tr.kinds.len())
                    .filter(|&i| i != tr.scale)
                    .map(|i| if tr.kinds[i] == ParamKind::Variance { log_ratio } else { 0.0 })
                    .collect();
                let f = problem.value(&u);
                if f < best.0 {
                    best = (f, u);
                }
            }
            best.1
        }
    };

    let (mut u, mut iterations) = if x0.is_empty() {
        (x0, 0)
    } else {
        let mut u = x0.clone();
        let mut iters = 0;
        if let Some((x, it)) = run_bfgs(&problem, x0.clone(), opts.max_iter, opts.grad_tol) {
            u = x;
            iters += it;
        }
        if max_abs(&problem.grad(&u)) > opts.grad_tol {
            if let Some((x, it)) = run_nelder_mead(&problem, &u, opts.max_iter) {
                iters += it;
                let (x, it2) = run_bfgs(&problem, x.clone(), opts.max_iter, opts.grad_tol).unwrap_or((x, 0));
                if problem.value(&x) <= problem.value(&u) {
                    u = x;
                }
                iters += it2;
            }
        }
        (u, iters)
    };
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
    iterations = iterations.max(u64::from(!u.is_empty()));
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
/// log-likelihood in the model's parameters.
fn std_errors(spec: &ModelSpec, params: &[f64], obs: &Observations, path: Path) -> Vec<Option<f64>> {
    let k = params.len();
    let none = vec![None; k];
    let f = |x: &[f64]| loglik(spec, x, obs, path).ok().filter(|v| v.is_finite());
    let Some(f0) = f(params) else { return none };
    let h: Vec<f64> = params.iter().map(|p| 1e-4 * p.abs().max(1e-4)).collect();
    let mut hess = DMatrix::zeros(k, k);
    let mut x = params.to_vec();
    for i in 0..k {
        x[i] = params[i] + h[i];
        let fp = f(&x);
        x[i] = params[i] - h[i];
        let fm = f(&x);
        x[i] = params[i];
        let (Some(fp), Some(fm)) = (fp, fm) else {
            return none;
        };
        hess[(i, i)] = (fp - 2.0 * f0 + fm) / (h[i] * h[i]);
        for j in 0..i {
            let mut g = |si: f64, sj: f64| {
                x[i] = params[i] + si * h[i];
                x[j] = params[j] + sj * h[j];
                let v = f(&x);
                x[i] = params[i];
                x[j] = params[j];
                v
            };
            let (Some(a), Some(b), Some(c), Some(d)) = (g(1.0, 1.0), g(1.0, -1.0), g(-1.0, 1.0), g(-1.0, -1.0)) else {
                return none;
            };
            let v = (a - b - c + d) / (4.0 * h[i] * h[j]);
            hess[(i, j)] = v;
            hess[(j, i)] = v;
        }
    }
    let neg = -hess;
    let Some(chol) = neg.cholesky() else {
        return none;
    };
    let cov = chol.inverse();
    (0..k).map(|i| Some(cov[(i, i)].sqrt()).filter(|v| v.is_finite())).collect()
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
}
