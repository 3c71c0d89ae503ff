//! The state-space representation.
//!
//! Observation and state equations (Durbin & Koopman 2012, §4.1, eq. 4.12):
//!
//! ```text
//! y_t     = Z a_t + d + e_t,        e_t ~ N(0, H_t),  H_t = diag(h) * w_t
//! a_{t+1} = T a_t + c + R n_t,      n_t ~ N(0, Q)
//! a_1     ~ N(a1, P1_star + kappa * P1_inf),  kappa -> infinity
//! ```
//!
//! | symbol | field | shape | meaning |
//! |---|---|---|---|
//! | y_t | `Observations::y` | p | observation vector at time t (NaN = missing) |
//! | Z | `z` | p x m | observation (design) matrix |
//! | d | `d` | p | observation intercept |
//! | H | `h` | p | diagonal of the observation noise covariance |
//! | w_t | `Observations::h_scale` | p per t | multiplier of H at time t (e.g. uncertain quality) |
//! | a_t | state | m | state vector |
//! | T | `t` | m x m | system (transition) matrix for one nominal period |
//! | c | `c` | m | state intercept |
//! | R | `r` | m x g | selection matrix of the state disturbance |
//! | Q | `q` | g x g | state disturbance covariance |
//! | a1 | `a1` | m | mean of the initial state |
//! | P1_star | `p1_star` | m x m | finite part of the initial covariance |
//! | P1_inf | `p1_inf` | m x m | diffuse part of the initial covariance (exact diffuse, DK §5.1) |
//!
//! H must be diagonal: the filter processes the elements of y_t one at a
//! time (the univariate treatment of DK §6.4), which needs no matrix
//! inversion and handles partly missing y_t naturally.
//!
//! # Time steps
//! T and RQR' describe one nominal sampling period. When the time from t to
//! t+1 is `dt` periods (irregular sampling, or a gap that the caller did not
//! fill with missing rows), each block of the state follows its own rule
//! ([`StepRule`]): a random-walk level has variance `q * dt` (exact for any
//! dt); a local linear trend uses the closed form of the k-step composition;
//! everything else (ARMA) is stepped `k = max(1, round(dt))` whole periods,
//! T^k and sum_{j<k} T^j RQR' T^j', which is exactly what k-1 missing
//! observations in between would give.

use nalgebra::{DMatrix, DVector};

/// How one diagonal block of the state responds to a step of `dt` periods.
#[derive(Debug, Clone, PartialEq)]
pub enum StepRule {
    /// Random walk with variance `q` per period: T = 1, Q = q dt.
    RandomWalk { q: f64 },
    /// Local linear trend (level, slope) with level variance `q_level` and
    /// slope variance `q_slope` per period. For k = dt >= 1:
    /// T = [[1, k], [0, 1]], Q = [[a k + b S2, b S1], [b S1, b k]] with
    /// S1 = k(k-1)/2 and S2 = (k-1)k(2k-1)/6 (the closed form of composing k
    /// single steps, exact at whole k); for dt < 1, Q = dt * diag(a, b).
    Trend { q_level: f64, q_slope: f64 },
    /// Constant: T = 1, Q = 0 whatever dt.
    Constant,
    /// Whole periods: T^k, sum_{j<k} T^j RQR' T^j', k = max(1, round(dt)).
    WholePeriods,
}

/// A diagonal block of the state vector and its step rule.
#[derive(Debug, Clone, PartialEq)]
pub struct StateBlock {
    /// First state index of the block.
    pub offset: usize,
    /// Number of states in the block.
    pub dim: usize,
    /// The block's rule for steps other than one period.
    pub rule: StepRule,
}

/// A linear Gaussian state-space model with time-invariant matrices and a
/// time-step rule. See the module documentation for the symbols.
#[derive(Debug, Clone, PartialEq)]
pub struct StateSpace {
    pub z: DMatrix<f64>,
    pub d: DVector<f64>,
    pub h: DVector<f64>,
    pub t: DMatrix<f64>,
    pub c: DVector<f64>,
    pub r: DMatrix<f64>,
    pub q: DMatrix<f64>,
    pub a1: DVector<f64>,
    pub p1_star: DMatrix<f64>,
    pub p1_inf: DMatrix<f64>,
    /// Block structure for time steps; one `WholePeriods` block covering the
    /// whole state when the model was built from raw matrices.
    pub blocks: Vec<StateBlock>,
}

impl StateSpace {
    /// A model from raw matrices with a zero intercepts and a known (non-diffuse)
    /// initial state. Panics if the shapes disagree (a programmer error).
    #[track_caller]
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        z: DMatrix<f64>,
        h: DVector<f64>,
        t: DMatrix<f64>,
        r: DMatrix<f64>,
        q: DMatrix<f64>,
        a1: DVector<f64>,
        p1_star: DMatrix<f64>,
        p1_inf: DMatrix<f64>,
    ) -> Self {
        let (p, m) = z.shape();
        let model = StateSpace {
            d: DVector::zeros(p),
            c: DVector::zeros(m),
            blocks: vec![StateBlock { offset: 0, dim: m, rule: StepRule::WholePeriods }],
            z,
            h,
            t,
            r,
            q,
            a1,
            p1_star,
            p1_inf,
        };
        model.check_shapes();
        model
    }

    /// Number of states m.
    pub fn state_dim(&self) -> usize {
        self.t.nrows()
    }

    /// Number of observation elements p.
    pub fn obs_dim(&self) -> usize {
        self.z.nrows()
    }

    /// Number of diffuse initial states (rank of `p1_inf`, counted as the
    /// number of non-zero diagonal elements, which is what every builder here makes).
    pub fn n_diffuse(&self) -> usize {
        (0..self.state_dim()).filter(|&i| self.p1_inf[(i, i)] != 0.0).count()
    }

    /// Panics unless every matrix has the shape the others imply.
    #[track_caller]
    pub fn check_shapes(&self) {
        let (p, m) = self.z.shape();
        let g = self.r.ncols();
        assert_eq!(self.d.len(), p, "d must have p elements");
        assert_eq!(self.h.len(), p, "h must have p elements");
        assert_eq!(self.t.shape(), (m, m), "T must be m x m");
        assert_eq!(self.c.len(), m, "c must have m elements");
        assert_eq!(self.r.nrows(), m, "R must have m rows");
        assert_eq!(self.q.shape(), (g, g), "Q must be g x g");
        assert_eq!(self.a1.len(), m, "a1 must have m elements");
        assert_eq!(self.p1_star.shape(), (m, m), "P1_star must be m x m");
        assert_eq!(self.p1_inf.shape(), (m, m), "P1_inf must be m x m");
        let covered: usize = self.blocks.iter().map(|b| b.dim).sum();
        assert_eq!(covered, m, "state blocks must cover the state");
    }

    /// R Q R' (m x m).
    pub fn rqr(&self) -> DMatrix<f64> {
        &self.r * &self.q * self.r.transpose()
    }

    /// True when no block needs the whole-period power rule.
    fn all_closed_form(&self) -> bool {
        self.blocks.iter().all(|b| !matches!(b.rule, StepRule::WholePeriods))
    }

    /// Writes T and RQR' for a step of `dt` periods into `sys`.
    /// Allocation-free once `sys` is sized for this model.
    pub fn system_for_step(&self, dt: f64, sys: &mut StepSystem) {
        let m = self.state_dim();
        sys.resize(m);
        if dt == 1.0 {
            sys.t.copy_from(&self.t);
            sys.rqr.copy_from(&sys.rqr1);
            sys.dt = dt;
            return;
        }
        if sys.last_dt == dt {
            // The same gap as last time (a subsample's blocks, a tag's
            // regular outages): copy instead of powering again.
            sys.t.copy_from(&sys.last_t);
            sys.rqr.copy_from(&sys.last_rqr);
            sys.dt = dt;
            return;
        }
        self.compute_system_for_step(dt, sys);
        sys.last_t.copy_from(&sys.t);
        sys.last_rqr.copy_from(&sys.rqr);
        sys.last_dt = dt;
    }

    fn compute_system_for_step(&self, dt: f64, sys: &mut StepSystem) {
        if !self.all_closed_form() {
            // Whole periods: (T^k, sum_{j<k} T^j RQR' T^j') by binary powering.
            // Two steps compose as (T_b T_a, T_b S_a T_b' + S_b); powers of one
            // system commute, so O(log k) products suffice even for a gap of
            // a day at one-second sampling.
            let mut k = dt.round().max(1.0) as u64;
            sys.t.fill_with_identity();
            sys.rqr.fill(0.0);
            sys.base_t.copy_from(&self.t);
            sys.base_s.copy_from(&sys.rqr1);
            loop {
                sys.base_tr.tr_copy_from(&sys.base_t);
                if k & 1 == 1 {
                    // result <- compose(result, base)
                    sys.tmp.gemm(1.0, &sys.base_t, &sys.rqr, 0.0);
                    sys.tmp2.gemm(1.0, &sys.tmp, &sys.base_tr, 0.0);
                    sys.rqr.copy_from(&sys.tmp2);
                    sys.rqr += &sys.base_s;
                    sys.tmp.gemm(1.0, &sys.base_t, &sys.t, 0.0);
                    sys.t.copy_from(&sys.tmp);
                }
                k >>= 1;
                if k == 0 {
                    break;
                }
                // base <- compose(base, base)
                sys.tmp.gemm(1.0, &sys.base_t, &sys.base_s, 0.0);
                sys.tmp2.gemm(1.0, &sys.tmp, &sys.base_tr, 0.0);
                sys.base_s += &sys.tmp2;
                sys.tmp.gemm(1.0, &sys.base_t, &sys.base_t, 0.0);
                sys.base_t.copy_from(&sys.tmp);
            }
        } else {
            sys.t.fill(0.0);
            sys.rqr.fill(0.0);
        }
        for b in &self.blocks {
            let o = b.offset;
            match b.rule {
                StepRule::WholePeriods => {}
                StepRule::Constant => {
                    sys.t[(o, o)] = 1.0;
                }
                StepRule::RandomWalk { q } => {
                    sys.t[(o, o)] = 1.0;
                    sys.rqr[(o, o)] = q * dt;
                }
                StepRule::Trend { q_level: a, q_slope: b } => {
                    sys.t[(o, o)] = 1.0;
                    sys.t[(o, o + 1)] = dt;
                    sys.t[(o + 1, o)] = 0.0;
                    sys.t[(o + 1, o + 1)] = 1.0;
                    let (q00, q01, q11) = if dt >= 1.0 {
                        let k = dt;
                        let s1 = k * (k - 1.0) / 2.0;
                        let s2 = (k - 1.0) * k * (2.0 * k - 1.0) / 6.0;
                        (a * k + b * s2, b * s1, b * k)
                    } else {
                        (a * dt, 0.0, b * dt)
                    };
                    sys.rqr[(o, o)] = q00;
                    sys.rqr[(o, o + 1)] = q01;
                    sys.rqr[(o + 1, o)] = q01;
                    sys.rqr[(o + 1, o + 1)] = q11;
                }
            }
        }
        sys.dt = dt;
    }

    /// A fresh step buffer for this model, holding the one-period system.
    pub fn step_system(&self) -> StepSystem {
        let m = self.state_dim();
        let mut sys = StepSystem::new(m);
        sys.rqr1 = self.rqr();
        sys.t.copy_from(&self.t);
        sys.rqr.copy_from(&sys.rqr1);
        sys.dt = 1.0;
        sys
    }
}

/// Preallocated T and RQR' for one step length, with scratch space. It
/// belongs to the model whose [`StateSpace::step_system`] made it (it keeps
/// that model's last multi-period step).
#[derive(Debug, Clone)]
pub struct StepSystem {
    /// T for the current step.
    pub t: DMatrix<f64>,
    /// RQR' for the current step.
    pub rqr: DMatrix<f64>,
    /// The step length `t` and `rqr` were computed for.
    pub dt: f64,
    rqr1: DMatrix<f64>,
    base_tr: DMatrix<f64>,
    tmp: DMatrix<f64>,
    tmp2: DMatrix<f64>,
    base_t: DMatrix<f64>,
    base_s: DMatrix<f64>,
    /// The last step length other than one period, with its T and RQR'.
    last_dt: f64,
    last_t: DMatrix<f64>,
    last_rqr: DMatrix<f64>,
}

impl StepSystem {
    fn new(m: usize) -> Self {
        StepSystem {
            t: DMatrix::zeros(m, m),
            rqr: DMatrix::zeros(m, m),
            dt: f64::NAN,
            rqr1: DMatrix::zeros(m, m),
            base_tr: DMatrix::zeros(m, m),
            tmp: DMatrix::zeros(m, m),
            tmp2: DMatrix::zeros(m, m),
            base_t: DMatrix::zeros(m, m),
            base_s: DMatrix::zeros(m, m),
            last_dt: f64::NAN,
            last_t: DMatrix::zeros(m, m),
            last_rqr: DMatrix::zeros(m, m),
        }
    }

    fn resize(&mut self, m: usize) {
        assert_eq!(self.t.nrows(), m, "StepSystem built for another model");
    }
}

const SIGN_BIT: u64 = 1 << 63;
const INFINITY_BITS: u64 = 0x7ff0_0000_0000_0000;

/// True when `bad` holds for the bits of any value of `x`. Blocks of 8 are
/// tested whole with integer compares, which vectorise (a fold of float
/// tests over the whole slice did not).
#[inline]
fn any_of_bits(x: &[f64], bad: impl Fn(u64) -> bool) -> bool {
    let mut blocks = x.chunks_exact(8);
    let mut found = false;
    for b in &mut blocks {
        let mut any = 0u8;
        for v in b {
            any |= u8::from(bad(v.to_bits()));
        }
        found |= any != 0;
    }
    found || blocks.remainder().iter().any(|v| bad(v.to_bits()))
}

/// The data a filter runs on. `y` holds n rows of p elements (row-major);
/// NaN marks a missing element.
#[derive(Debug, Clone, Copy)]
pub struct Observations<'a> {
    /// n x p observations, row-major; NaN = missing.
    pub y: &'a [f64],
    /// Number of elements per time p.
    pub p: usize,
    /// Optional time from t to t+1 in nominal periods (length n; the last
    /// value is not used). `None` means every step is one period.
    pub dt: Option<&'a [f64]>,
    /// Optional multiplier of H per element (n x p, row-major, > 0).
    pub h_scale: Option<&'a [f64]>,
}

impl<'a> Observations<'a> {
    /// A univariate series on a regular grid.
    pub fn univariate(y: &'a [f64]) -> Self {
        Observations { y, p: 1, dt: None, h_scale: None }
    }

    /// Number of time points n.
    pub fn len(&self) -> usize {
        self.y.len().checked_div(self.p).unwrap_or(0)
    }

    /// True when there is no time point.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Checks the data: infinite values and bad time steps are errors
    /// (NaN is a missing value).
    pub fn validate(&self) -> super::Result<()> {
        use super::SsmError;
        // (Each check first runs over the whole array without stopping,
        // which vectorises; the search for the index runs only on a failure.)
        let infinite = |v: &f64| v.abs() == f64::INFINITY;
        if any_of_bits(self.y, |b| b & !SIGN_BIT == INFINITY_BITS) {
            if let Some((index, &value)) = self.y.iter().enumerate().find(|(_, v)| infinite(v)) {
                return Err(SsmError::NonFiniteObservation { index, value });
            }
        }
        if let Some(dt) = self.dt {
            assert_eq!(dt.len(), self.len(), "dt must have one entry per time point");
            let last = dt.len().saturating_sub(1);
            let bad_step = |v: &f64| !(v.is_finite() && *v > 0.0);
            // (A positive finite double's bits, as an integer, lie in 1 ..
            // the bits of infinity; zero, negatives and NaN lie outside.)
            if any_of_bits(&dt[..last], |b| b.wrapping_sub(1) >= INFINITY_BITS - 1) {
                if let Some((index, &value)) = dt[..last].iter().enumerate().find(|(_, v)| bad_step(v)) {
                    return Err(SsmError::BadTimeStep { index, value });
                }
            }
        }
        if let Some(w) = self.h_scale {
            assert_eq!(w.len(), self.y.len(), "h_scale must match y");
        }
        Ok(())
    }

    /// Step length after time `t`.
    #[inline]
    pub fn step(&self, t: usize) -> f64 {
        match self.dt {
            Some(dt) => dt[t],
            None => 1.0,
        }
    }

    /// H multiplier of element `i` at time `t`.
    #[inline]
    pub fn weight(&self, t: usize, i: usize) -> f64 {
        match self.h_scale {
            Some(w) => w[t * self.p + i],
            None => 1.0,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_bit_tests_of_validate_agree_with_the_float_tests() {
        let special = [
            0.0,
            -0.0,
            1.0,
            -1.0,
            f64::MIN_POSITIVE,
            f64::MIN_POSITIVE / 4.0, // subnormal
            -f64::MIN_POSITIVE / 4.0,
            f64::MAX,
            f64::MIN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NAN,
            -f64::NAN,
        ];
        for &v in &special {
            // Alone, and inside a block of 8 (the vectorised path).
            for len in [1, 8, 19] {
                for at in [0, len - 1] {
                    let mut x = vec![2.5; len];
                    x[at] = v;
                    let y = Observations::univariate(&x);
                    let want_y = v.is_infinite();
                    assert_eq!(y.validate().is_err(), want_y, "y = {v} at {at} of {len}");
                    let mut with_next = x.clone();
                    with_next.push(1.0); // (the last step is never taken)
                    let ones = vec![1.0; len + 1];
                    let o = Observations { y: &ones, dt: Some(&with_next), ..Observations::univariate(&ones) };
                    let want_dt = !(v.is_finite() && v > 0.0);
                    assert_eq!(o.validate().is_err(), want_dt, "dt = {v} at {at} of {len}");
                }
            }
        }
    }
}
