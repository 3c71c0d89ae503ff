//! Maximum-likelihood estimation of the group's variances and the choice of
//! the members that carry a bias state.
//!
//! The free parameters are the members' noise variances sigma2_i and the
//! process variance q_x; the bias variance q_b comes from the stated drift
//! rate and is not estimated (a shift holds too little information about a
//! slow bias to estimate its rate). The optimiser works on
//! u = log(variance), starting from the robust moments of
//! [`crate::model::moment_start`], and maximises the exact diffuse
//! log-likelihood of the prediction-error decomposition (DK 2012, §7.2) by
//! BFGS with a backtracking (Armijo) line search and central-difference
//! gradients (Nocedal & Wright 2006, ch. 6 and 8). Each u is kept within
//! [u0 - 25, u0 + 10] of its start, so a variance that tends to zero stays a
//! finite number.

use argmin::core::{CostFunction, Executor, Gradient, State};
use argmin::solver::linesearch::condition::ArmijoCondition;
use argmin::solver::linesearch::BacktrackingLineSearch;
use argmin::solver::quasinewton::BFGS;
use tagwright::ssm::FilterOutput;

use crate::align::GroupData;
use crate::model::{GroupModel, Segment, Structure, Variances};

/// Largest number of BFGS iterations.
const MAX_ITER: u64 = 60;
/// Convergence: largest |d loglik / d log variance| per observation.
const GRAD_TOL: f64 = 1e-6;

/// Result of a fit.
#[derive(Debug, Clone, PartialEq)]
pub struct Fit {
    pub variances: Variances,
    pub loglik: f64,
    pub converged: bool,
    pub iterations: u64,
}

struct Problem<'a> {
    data: &'a GroupData,
    st: &'a Structure,
    u0: Vec<f64>,
    model: std::cell::RefCell<GroupModel>,
    out: std::cell::RefCell<FilterOutput>,
    nobs: f64,
    evals: std::cell::Cell<u64>,
}

impl Problem<'_> {
    fn variances(&self, u: &[f64]) -> Variances {
        let m = self.data.m;
        let e = |i: usize| u[i].clamp(self.u0[i] - 25.0, self.u0[i] + 10.0).exp();
        Variances { noise: (0..m).map(e).collect(), process: e(m) }
    }

    fn value(&self, u: &[f64]) -> f64 {
        self.evals.set(self.evals.get() + 1);
        let v = self.variances(u);
        let mut model = self.model.borrow_mut();
        model.set_variances(&v, self.st.q_bias);
        let ll = model.loglik(self.data, &mut self.out.borrow_mut());
        if ll.is_finite() {
            -ll / self.nobs
        } else {
            1e100
        }
    }

    fn grad(&self, u: &[f64]) -> Vec<f64> {
        let mut g = vec![0.0; u.len()];
        let mut x = u.to_vec();
        for i in 0..u.len() {
            let h = 1e-5;
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

/// argmin takes its problem by value; this wrapper lends it the borrowed one.
struct ProblemRef<'a, 'b>(&'a Problem<'b>);

impl CostFunction for ProblemRef<'_, '_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, u: &Self::Param) -> Result<f64, argmin::core::Error> {
        Ok(self.0.value(u))
    }
}

impl Gradient for ProblemRef<'_, '_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, u: &Self::Param) -> Result<Vec<f64>, argmin::core::Error> {
        Ok(self.0.grad(u))
    }
}

fn run_bfgs(problem: &Problem, x0: Vec<f64>) -> Option<(Vec<f64>, u64)> {
    // Initial inverse Hessian: the inverse of the diagonal of the Hessian at
    // the start by second differences, so the first steps are Newton steps
    // in each coordinate (the start is close; this saves most iterations).
    let k = x0.len();
    let f0 = problem.value(&x0);
    let mut x = x0.clone();
    let h = 1e-2;
    let mut diag = vec![1.0; k];
    for (i, d) in diag.iter_mut().enumerate() {
        x[i] = x0[i] + h;
        let fp = problem.value(&x);
        x[i] = x0[i] - h;
        let fm = problem.value(&x);
        x[i] = x0[i];
        let c = (fp - 2.0 * f0 + fm) / (h * h);
        if c.is_finite() && c > 1e-6 {
            *d = (1.0 / c).min(1e3);
        }
    }
    let h0: Vec<Vec<f64>> = (0..k).map(|i| (0..k).map(|j| if i == j { diag[i] } else { 0.0 }).collect()).collect();
    let linesearch = BacktrackingLineSearch::new(ArmijoCondition::new(1e-4).ok()?).rho(0.5).ok()?;
    let solver = BFGS::new(linesearch).with_tolerance_grad(GRAD_TOL * 0.1).ok()?.with_tolerance_cost(1e-14).ok()?;
    let res = Executor::new(ProblemRef(problem), solver)
        .configure(|s| s.param(x0).inv_hessian(h0).max_iters(MAX_ITER))
        .run()
        .ok()?;
    let state = res.state();
    Some((state.get_best_param()?.clone(), state.get_iter()))
}

/// Maximum-likelihood variances of the structure, from the start `v0`.
pub fn fit(data: &GroupData, st: &Structure, v0: &Variances) -> Fit {
    let m = data.m;
    let u0: Vec<f64> = v0.noise.iter().chain([&v0.process]).map(|v| v.max(1e-300).ln()).collect();
    let model = GroupModel::new(data, st, v0);
    let mut out = FilterOutput::default();
    let ll0 = model.loglik(data, &mut out);
    let nobs = (out.nobs + out.n_diffuse_obs).max(1) as f64;
    if !ll0.is_finite() || out.nobs == 0 {
        return Fit { variances: v0.clone(), loglik: ll0, converged: false, iterations: 0 };
    }
    let problem = Problem {
        data,
        st,
        u0: u0.clone(),
        model: std::cell::RefCell::new(model),
        out: std::cell::RefCell::new(out),
        nobs,
        evals: std::cell::Cell::new(0),
    };
    let (mut u, iterations) = run_bfgs(&problem, u0.clone()).unwrap_or((u0.clone(), 0));
    if problem.value(&u) > problem.value(&u0) {
        u = u0;
    }
    let g = problem.grad(&u);
    let converged = g.iter().all(|x| x.abs() <= GRAD_TOL * 10.0);
    let variances = problem.variances(&u);
    let loglik = -problem.value(&u) * nobs;
    debug_assert_eq!(variances.noise.len(), m);
    Fit { variances, loglik, converged, iterations }
}

/// Likelihood gain (log units) a member must bring to be given a bias state
/// when no member is trusted. The comparison is between models with the
/// same free parameters and proper priors on the bias states, so the
/// difference of log-likelihoods already carries an Occam factor
/// 1/2 log(V0 / posterior variance) per state; the gain asked on top is a
/// likelihood ratio of e^10, i.e. far beyond chance (a chi-square(1)
/// statistic of 20, p ~ 8e-6).
pub const SELECT_GAIN: f64 = 10.0;

/// The members that carry a bias state in a group without a trusted member,
/// chosen by forward selection on the likelihood at the start variances: a
/// member is added while the best addition gains more than [`SELECT_GAIN`],
/// up to floor((m - 1) / 2) members, so the unbiased members are always a
/// strict majority. `prior(j)` gives member j's bias prior (mean, variance).
/// Returns the chosen members (sorted) and the log-likelihood of each model tried.
pub fn select_biased(
    data: &GroupData,
    v: &Variances,
    q_bias: f64,
    prior: &dyn Fn(usize) -> (f64, f64),
) -> (Vec<usize>, Vec<(Vec<usize>, f64)>) {
    let (n, m) = (data.len(), data.m);
    let structure = |set: &[usize]| Structure {
        segments: set
            .iter()
            .map(|&j| {
                let (prior_mean, prior_var) = prior(j);
                Segment { member: j, from: 0, to: n, prior_mean, prior_var, after_step: false }
            })
            .collect(),
        q_bias,
    };
    let mut out = FilterOutput::default();
    let mut ll = |set: &[usize]| GroupModel::new(data, &structure(set), v).loglik(data, &mut out);
    let mut chosen: Vec<usize> = Vec::new();
    let mut best = ll(&chosen);
    let mut tried = vec![(chosen.clone(), best)];
    while chosen.len() < (m - 1) / 2 {
        let mut add: Option<(usize, f64)> = None;
        for j in (0..m).filter(|j| !chosen.contains(j)) {
            let mut set = chosen.clone();
            set.push(j);
            set.sort_unstable();
            let l = ll(&set);
            tried.push((set, l));
            if l.is_finite() && add.is_none_or(|(_, b)| l > b) {
                add = Some((j, l));
            }
        }
        match add {
            Some((j, l)) if !best.is_finite() || l - best > SELECT_GAIN => {
                chosen.push(j);
                chosen.sort_unstable();
                best = l;
            }
            _ => break,
        }
    }
    (chosen, tried)
}
