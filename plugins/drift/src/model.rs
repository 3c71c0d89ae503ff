//! The group's state-space model.
//!
//! For m members measuring one quantity, at axis point t (a multivariate
//! structural model, Harvey 1989, ch. 8, from memory; state-space form of
//! Durbin & Koopman 2012, §4.1):
//!
//! ```text
//! y_i,t   = x_t + b_i,t + e_i,t          e_i,t ~ N(0, sigma2_i * w_i,t)
//! x_{t+1} = x_t + eta_t                  eta_t ~ N(0, q_x * dt_t)
//! b_{t+1} = b_t + zeta_t                 zeta_t ~ N(0, q_b * dt_t)
//! ```
//!
//! Only the members of the attribution's biased set carry a bias state; the
//! others (and a trusted member) have b = 0. A bias is stored as one or more
//! *segments*: a member whose bias jumps at axis point tau (a detected step)
//! gets a new bias state from tau on, observed only from tau on, with a vague
//! prior, which is the limit of an intervention with unbounded variance on
//! b at tau (intervention analysis in Harvey 1989, ch. 7, and DK 2012, ch. 3;
//! chapter numbers from memory). Each
//! segment is one observation column whose Z row is [1, 0, .., 1, .., 0]
//! (process plus its state); a member without a bias state is one column with
//! Z row [1, 0, .., 0]; readings outside a column's segment are missing there.
//!
//! State vector a_t = (x_t, b_1,t, .., b_k,t) for k segments: T = I, R = I,
//! Q = diag(q_x, q_b, .., q_b) per nominal period (a random walk has variance
//! q dt over dt periods, exact for any dt), H = diag(sigma2_member(column)).
//! x_t starts diffuse (exact diffuse initialisation, DK §5.2); a bias state
//! starts from the carried state of the previous run or from N(0, V0) with
//! V0 = (10 tolerance)^2, proper so that likelihoods of different biased sets
//! can be compared.

use nalgebra::{DMatrix, DVector};
use tagwright::ssm::model::{StateBlock, StepRule};
use tagwright::ssm::{filter_into, FilterOptions, FilterOutput, Observations, StateSpace};

use crate::align::GroupData;

/// The bias of one member over axis points [from, to).
#[derive(Debug, Clone, PartialEq)]
pub struct Segment {
    pub member: usize,
    pub from: usize,
    pub to: usize,
    /// Mean and variance of the bias state before the segment's first reading.
    pub prior_mean: f64,
    pub prior_var: f64,
    /// True if the segment starts at a detected step.
    pub after_step: bool,
}

/// Which members carry a bias state, and where their bias may jump.
#[derive(Debug, Clone, PartialEq)]
pub struct Structure {
    /// In member order; a member's segments are consecutive and in time order.
    pub segments: Vec<Segment>,
    /// Bias random-walk variance per nominal period.
    pub q_bias: f64,
}

impl Structure {
    /// True if member `j` carries a bias state.
    pub fn is_biased(&self, j: usize) -> bool {
        self.segments.iter().any(|s| s.member == j)
    }

    /// Index of the segment of member `j` covering axis point `t`.
    pub fn segment_at(&self, j: usize, t: usize) -> Option<usize> {
        self.segments.iter().position(|s| s.member == j && s.from <= t && t < s.to)
    }
}

/// Noise variances of the members and the process variance per period.
#[derive(Debug, Clone, PartialEq)]
pub struct Variances {
    pub noise: Vec<f64>,
    pub process: f64,
}

/// The model of a group with its observation columns.
#[derive(Debug, Clone)]
pub struct GroupModel {
    pub ss: StateSpace,
    /// Observations by column, n x p row-major; NaN = missing.
    pub y: Vec<f64>,
    /// H multipliers, n x p.
    pub w: Vec<f64>,
    /// Number of columns p.
    pub p: usize,
    /// Member of each column.
    pub col_member: Vec<usize>,
}

impl GroupModel {
    /// Builds the model of `st` for the aligned data.
    pub fn new(data: &GroupData, st: &Structure, v: &Variances) -> Self {
        let (n, m) = (data.len(), data.m);
        // Columns: unbiased members first (in member order), then segments.
        let mut col_member: Vec<usize> = (0..m).filter(|&j| !st.is_biased(j)).collect();
        let n_plain = col_member.len();
        col_member.extend(st.segments.iter().map(|s| s.member));
        let p = col_member.len();
        let k = st.segments.len();
        let ms = 1 + k;
        let mut y = vec![f64::NAN; n * p];
        let mut w = vec![1.0; n * p];
        for t in 0..n {
            for (c, &j) in col_member.iter().enumerate().take(n_plain) {
                y[t * p + c] = data.at(t, j);
                w[t * p + c] = data.w[t * m + j];
            }
        }
        for (s, seg) in st.segments.iter().enumerate() {
            let c = n_plain + s;
            for t in seg.from..seg.to.min(n) {
                y[t * p + c] = data.at(t, seg.member);
                w[t * p + c] = data.w[t * m + seg.member];
            }
        }
        let mut z = DMatrix::zeros(p, ms);
        for c in 0..p {
            z[(c, 0)] = 1.0;
            if c >= n_plain {
                z[(c, 1 + c - n_plain)] = 1.0;
            }
        }
        let mut a1 = DVector::zeros(ms);
        let mut p1_star = DMatrix::zeros(ms, ms);
        let mut p1_inf = DMatrix::zeros(ms, ms);
        p1_inf[(0, 0)] = 1.0;
        for (s, seg) in st.segments.iter().enumerate() {
            a1[1 + s] = seg.prior_mean;
            p1_star[(1 + s, 1 + s)] = seg.prior_var;
        }
        let mut ss = StateSpace::new(
            z,
            DVector::zeros(p),
            DMatrix::identity(ms, ms),
            DMatrix::identity(ms, ms),
            DMatrix::zeros(ms, ms),
            a1,
            p1_star,
            p1_inf,
        );
        ss.blocks = (0..ms).map(|i| StateBlock { offset: i, dim: 1, rule: StepRule::RandomWalk { q: 0.0 } }).collect();
        let mut model = GroupModel { ss, y, w, p, col_member };
        model.set_variances(v, st.q_bias);
        model
    }

    /// Puts the variances into H, Q and the step rules.
    pub fn set_variances(&mut self, v: &Variances, q_bias: f64) {
        for (c, &j) in self.col_member.iter().enumerate() {
            self.ss.h[c] = v.noise[j];
        }
        let ms = self.ss.state_dim();
        for i in 0..ms {
            let q = if i == 0 { v.process } else { q_bias };
            self.ss.q[(i, i)] = q;
            self.ss.blocks[i].rule = StepRule::RandomWalk { q };
        }
    }

    /// The observations as the filter takes them.
    pub fn obs<'a>(&'a self, data: &'a GroupData) -> Observations<'a> {
        Observations { y: &self.y, p: self.p, dt: Some(&data.dt), h_scale: Some(&self.w) }
    }

    /// Log-likelihood (prediction-error decomposition, exact diffuse start);
    /// `out` is reused between calls. NaN if the filter refuses the data.
    pub fn loglik(&self, data: &GroupData, out: &mut FilterOutput) -> f64 {
        match filter_into(&self.ss, &self.obs(data), &FilterOptions::loglik_only(), out) {
            Ok(()) => out.loglik,
            Err(_) => f64::NAN,
        }
    }
}

/// Robust variance of a sample: (1.4826 MAD)^2 (Hampel 1974); None for
/// fewer than 5 values. Reorders `x`.
pub fn robust_var(x: &mut [f64]) -> Option<f64> {
    if x.len() < 5 {
        return None;
    }
    let med = median(x);
    for v in x.iter_mut() {
        *v = (*v - med).abs();
    }
    let mad = median(x);
    Some((1.4826 * mad).powi(2))
}

/// Median (reorders `x`; `x` must not be empty).
pub fn median(x: &mut [f64]) -> f64 {
    let mid = x.len() / 2;
    let (_, m, _) = x.select_nth_unstable_by(mid, |a, b| a.total_cmp(b));
    *m
}

/// Axis points farther apart than this many periods do not make a difference.
const MAX_DIFF_GAP: f64 = 2.5;

/// Start values from robust moments of first differences. With
/// d_j = y_j,t' - y_j,t over one period, Var(d_j) = q_x + 2 sigma2_j and
/// Var(d_j - d_k) = 2 (sigma2_j + sigma2_k) (the slow bias moves are
/// negligible over one period), so each pair gives the process variance as
/// Cov(d_j, d_k) = (Var d_j + Var d_k - Var(d_j - d_k)) / 2; q_x is the median
/// over pairs and sigma2_j = (Var d_j - q_x) / 2. Variances are taken as
/// squared scaled median absolute deviations, so spikes and steps do not inflate them.
pub fn moment_start(data: &GroupData) -> Variances {
    let (n, m) = (data.len(), data.m);
    let mut buf = Vec::with_capacity(n);
    let mut var_d = vec![f64::NAN; m];
    for (j, vd) in var_d.iter_mut().enumerate() {
        buf.clear();
        let mut last: Option<usize> = None;
        for t in 0..n {
            if data.at(t, j).is_nan() {
                continue;
            }
            if let Some(l) = last {
                if data.s[t] - data.s[l] <= MAX_DIFF_GAP {
                    buf.push(data.at(t, j) - data.at(l, j));
                }
            }
            last = Some(t);
        }
        *vd = robust_var(&mut buf).unwrap_or(f64::NAN);
    }
    let mut covs = Vec::new();
    for j in 0..m {
        for k in j + 1..m {
            buf.clear();
            let mut last: Option<usize> = None;
            for t in 0..n {
                if data.at(t, j).is_nan() || data.at(t, k).is_nan() {
                    continue;
                }
                if let Some(l) = last {
                    if data.s[t] - data.s[l] <= MAX_DIFF_GAP {
                        buf.push((data.at(t, j) - data.at(t, k)) - (data.at(l, j) - data.at(l, k)));
                    }
                }
                last = Some(t);
            }
            if let Some(v) = robust_var(&mut buf) {
                let c = 0.5 * (var_d[j] + var_d[k] - v);
                if c.is_finite() {
                    covs.push(c);
                }
            }
        }
    }
    let finite: Vec<f64> = var_d.iter().copied().filter(|v| v.is_finite()).collect();
    let scale = finite.iter().fold(0.0f64, |a, &b| a.max(b));
    let floor = (1e-6 * scale).max(1e-12);
    let process = if covs.is_empty() {
        // No common readings: split each member's differences half and half.
        0.5 * median(&mut finite.clone().into_iter().chain([floor]).collect::<Vec<_>>())
    } else {
        median(&mut covs)
    }
    .max(floor);
    let noise = var_d
        .iter()
        .map(|&v| if v.is_finite() { (0.5 * (v - process)).max(1e-3 * v).max(floor) } else { f64::NAN })
        .collect::<Vec<_>>();
    // A member without readings gets the median of the others (it enters no likelihood).
    let mut known: Vec<f64> = noise.iter().copied().filter(|v| v.is_finite()).collect();
    let fallback = if known.is_empty() { floor.max(1.0) } else { median(&mut known) };
    let noise = noise.into_iter().map(|v| if v.is_finite() { v } else { fallback }).collect();
    Variances { noise, process }
}
