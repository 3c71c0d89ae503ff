//! ARMA(p,q) processes in state-space (companion) form.
//!
//! Sign convention (the one used throughout tagwright):
//!
//! ```text
//! x_t = phi_1 x_{t-1} + ... + phi_p x_{t-p} + e_t + theta_1 e_{t-1} + ... + theta_q e_{t-q},
//! e_t ~ N(0, sigma2)
//! ```
//!
//! Companion form with state dimension r = max(p, q+1) (Harvey 1989, §3.3;
//! Durbin & Koopman 2012, §3.4), phi_j = 0 for j > p and theta_j = 0 for j > q:
//!
//! ```text
//!           [ phi_1      1  0 ... 0 ]            [ 1          ]
//!           [ phi_2      0  1 ... 0 ]            [ theta_1    ]
//! a_{t+1} = [ ...              ...  ] a_t   +    [ ...        ] e_{t+1}
//!           [ phi_{r-1}  0  0 ... 1 ]            [ theta_{r-2}]
//!           [ phi_r      0  0 ... 0 ]            [ theta_{r-1}]
//! x_t = [1 0 ... 0] a_t
//! ```
//!
//! The first column of T holds the AR coefficients, the selection vector R
//! holds 1 and the MA coefficients, Q = sigma2. The first state is x_t.
//!
//! Stationarity and invertibility are checked by the step-down (Schur-Cohn)
//! recursion: an AR polynomial is stationary exactly when every partial
//! autocorrelation it maps to lies in (-1, 1) (Barndorff-Nielsen & Schou 1973;
//! Monahan 1984). The same map, run forwards from unconstrained reals, is the
//! transform the fitting code optimises over (Jones 1980; Monahan 1984).

use nalgebra::{DMatrix, DVector};

use super::{Result, SsmError};

/// Largest AR or MA order accepted. Beyond this the companion state and the
/// Kronecker Lyapunov solve (an r^2 x r^2 system) stop being sensible for
/// per-tag cleaning.
pub const MAX_ARMA_ORDER: usize = 10;

/// State dimension of the companion form: max(p, q + 1).
pub fn companion_dim(p: usize, q: usize) -> usize {
    p.max(q + 1)
}

/// Companion-form T (r x r) and R (r x 1) for the given coefficients.
pub fn companion(phi: &[f64], theta: &[f64]) -> (DMatrix<f64>, DMatrix<f64>) {
    let r = companion_dim(phi.len(), theta.len());
    let mut t = DMatrix::zeros(r, r);
    for (i, &f) in phi.iter().enumerate() {
        t[(i, 0)] = f;
    }
    for i in 0..r - 1 {
        t[(i, i + 1)] = 1.0;
    }
    let mut sel = DMatrix::zeros(r, 1);
    sel[(0, 0)] = 1.0;
    for (j, &th) in theta.iter().enumerate() {
        sel[(j + 1, 0)] = th;
    }
    (t, sel)
}

/// Partial autocorrelations (reflection coefficients) of an AR polynomial by
/// the step-down recursion; `Err((lag, pacf))` at the first |pacf| >= 1.
fn step_down(phi: &[f64]) -> std::result::Result<Vec<f64>, (usize, f64)> {
    let p = phi.len();
    let mut a = phi.to_vec();
    let mut pacf = vec![0.0; p];
    for k in (1..=p).rev() {
        let r = a[k - 1];
        pacf[k - 1] = r;
        if r.is_nan() || r.abs() >= 1.0 {
            return Err((k, r));
        }
        let denom = 1.0 - r * r;
        let prev: Vec<f64> = (0..k - 1).map(|j| (a[j] + r * a[k - 2 - j]) / denom).collect();
        a[..k - 1].copy_from_slice(&prev);
    }
    Ok(pacf)
}

/// AR coefficients from partial autocorrelations (Durbin-Levinson step-up).
fn step_up(pacf: &[f64], out: &mut [f64]) {
    let p = pacf.len();
    debug_assert_eq!(out.len(), p);
    let mut prev = vec![0.0; p];
    for k in 0..p {
        let r = pacf[k];
        prev[..k].copy_from_slice(&out[..k]);
        for j in 0..k {
            out[j] = prev[j] - r * prev[k - 1 - j];
        }
        out[k] = r;
    }
}

/// Errors unless phi is stationary (all roots of 1 - sum phi_j z^j outside the unit circle).
pub fn check_stationary(phi: &[f64]) -> Result<()> {
    step_down(phi).map(|_| ()).map_err(|(lag, pacf)| SsmError::NonStationary { phi: phi.to_vec(), lag, pacf })
}

/// Errors unless theta is invertible (all roots of 1 + sum theta_j z^j outside the unit circle).
pub fn check_invertible(theta: &[f64]) -> Result<()> {
    let neg: Vec<f64> = theta.iter().map(|t| -t).collect();
    step_down(&neg).map(|_| ()).map_err(|(lag, pacf)| SsmError::NonInvertible {
        theta: theta.to_vec(),
        lag,
        pacf: -pacf,
    })
}

/// Map unconstrained reals to stationary AR coefficients:
/// u -> pacf = u / sqrt(1 + u^2) -> Durbin-Levinson (Monahan 1984).
pub fn constrain_stationary(u: &[f64], out: &mut [f64]) {
    let pacf: Vec<f64> = u.iter().map(|&x| x / (1.0 + x * x).sqrt()).collect();
    step_up(&pacf, out);
}

/// Inverse of [`constrain_stationary`]; errors if phi is not stationary.
pub fn unconstrain_stationary(phi: &[f64]) -> Result<Vec<f64>> {
    let pacf = step_down(phi).map_err(|(lag, pacf)| SsmError::NonStationary { phi: phi.to_vec(), lag, pacf })?;
    Ok(pacf.iter().map(|&r| r / (1.0 - r * r).sqrt()).collect())
}

/// Map unconstrained reals to invertible MA coefficients (theta = -phi(u)).
pub fn constrain_invertible(u: &[f64], out: &mut [f64]) {
    constrain_stationary(u, out);
    out.iter_mut().for_each(|x| *x = -*x);
}

/// Inverse of [`constrain_invertible`].
pub fn unconstrain_invertible(theta: &[f64]) -> Result<Vec<f64>> {
    check_invertible(theta)?;
    let neg: Vec<f64> = theta.iter().map(|t| -t).collect();
    unconstrain_stationary(&neg)
}

/// Theoretical autocovariances gamma(0..=max_lag) of the ARMA process,
/// computed from the state-space form: gamma(h) = Z T^h P Z' with P the
/// stationary state covariance.
pub fn autocovariances(phi: &[f64], theta: &[f64], sigma2: f64, max_lag: usize) -> Result<Vec<f64>> {
    check_stationary(phi)?;
    let (t, sel) = companion(phi, theta);
    let rqr = &sel * sel.transpose() * sigma2;
    let p = super::lyapunov::solve_discrete_lyapunov(&t, &rqr)?;
    let r = t.nrows();
    let mut v = p.column(0).into_owned(); // P Z'
    let mut out = Vec::with_capacity(max_lag + 1);
    for _ in 0..=max_lag {
        out.push(v[0]);
        v = &t * v;
    }
    let _ = r;
    Ok(out)
}

/// Simulate n values of the ARMA process through the companion form, from
/// its stationary distribution, with shocks from `rng`. Also returns the shocks.
pub fn simulate(
    phi: &[f64],
    theta: &[f64],
    sigma2: f64,
    n: usize,
    rng: &mut crate::rng::Rng,
) -> Result<(Vec<f64>, Vec<f64>)> {
    check_stationary(phi)?;
    let (t, sel) = companion(phi, theta);
    let r = t.nrows();
    // Start from a long burn-in rather than a Cholesky draw: simpler and exact enough.
    let mut a = DVector::zeros(r);
    let sd = sigma2.sqrt();
    for _ in 0..1000 {
        let e = sd * rng.normal();
        a = &t * a + sel.column(0) * e;
    }
    let mut x = Vec::with_capacity(n);
    let mut shocks = Vec::with_capacity(n);
    for _ in 0..n {
        let e = sd * rng.normal();
        a = &t * a + sel.column(0) * e;
        x.push(a[0]);
        shocks.push(e);
    }
    Ok((x, shocks))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn transform_roundtrip() {
        let u = [0.3, -1.2, 2.0];
        let mut phi = [0.0; 3];
        constrain_stationary(&u, &mut phi);
        check_stationary(&phi).unwrap();
        let back = unconstrain_stationary(&phi).unwrap();
        for (a, b) in u.iter().zip(&back) {
            assert!((a - b).abs() < 1e-12, "{a} vs {b}");
        }
    }

    #[test]
    fn stationarity_examples() {
        // AR(1): stationary iff |phi| < 1 (standard result).
        assert!(check_stationary(&[0.99]).is_ok());
        assert!(check_stationary(&[1.0]).is_err());
        // AR(2) triangle: phi2 + phi1 < 1, phi2 - phi1 < 1, |phi2| < 1 (Hamilton 1994, §1.2).
        assert!(check_stationary(&[0.5, 0.3]).is_ok());
        assert!(check_stationary(&[0.5, 0.6]).is_err());
        assert!(check_stationary(&[-0.5, 0.6]).is_err());
        assert!(check_stationary(&[0.1, -1.0]).is_err());
        // MA(1): invertible iff |theta| < 1.
        assert!(check_invertible(&[0.9]).is_ok());
        assert!(check_invertible(&[-1.1]).is_err());
    }

    #[test]
    fn companion_layout() {
        let (t, r) = companion(&[0.5, -0.3], &[0.4]);
        assert_eq!(t.shape(), (2, 2));
        assert_eq!(t[(0, 0)], 0.5);
        assert_eq!(t[(1, 0)], -0.3);
        assert_eq!(t[(0, 1)], 1.0);
        assert_eq!(t[(1, 1)], 0.0);
        assert_eq!(r[(0, 0)], 1.0);
        assert_eq!(r[(1, 0)], 0.4);
        let (t, _) = companion(&[0.2], &[0.1, 0.1, 0.1]);
        assert_eq!(t.shape(), (4, 4));
    }
}
