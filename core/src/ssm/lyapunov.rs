//! The discrete Lyapunov equation P = T P T' + W.

use nalgebra::DMatrix;

use super::{Result, SsmError};

/// Solves P = T P T' + W for symmetric W by the Kronecker form
/// (I - T kron T) vec(P) = vec(W) (Hamilton 1994, eq. 10.2.18; Durbin &
/// Koopman 2012, §5.6.2). Cost O(m^6): meant for the small stationary blocks
/// of per-tag models (m <= 11 here). The result is symmetrised.
pub fn solve_discrete_lyapunov(t: &DMatrix<f64>, w: &DMatrix<f64>) -> Result<DMatrix<f64>> {
    let m = t.nrows();
    assert_eq!(t.shape(), (m, m));
    assert_eq!(w.shape(), (m, m));
    if m == 1 {
        let denom = 1.0 - t[(0, 0)] * t[(0, 0)];
        if denom.abs() < 1e-14 {
            return Err(SsmError::LyapunovSingular);
        }
        return Ok(DMatrix::from_element(1, 1, w[(0, 0)] / denom));
    }
    let n = m * m;
    let kron = t.kronecker(t);
    let a = DMatrix::<f64>::identity(n, n) - kron;
    let b = nalgebra::DVector::from_iterator(n, w.iter().cloned());
    let lu = a.lu();
    let x = lu.solve(&b).ok_or(SsmError::LyapunovSingular)?;
    if x.iter().any(|v| !v.is_finite()) {
        return Err(SsmError::LyapunovSingular);
    }
    let p = DMatrix::from_iterator(m, m, x.iter().cloned());
    Ok((&p + p.transpose()) * 0.5)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn residual_is_tiny() {
        let t = DMatrix::from_row_slice(3, 3, &[0.5, 1.0, 0.0, -0.3, 0.0, 1.0, 0.1, 0.0, 0.0]);
        let r = DMatrix::from_row_slice(3, 1, &[1.0, 0.4, -0.2]);
        let w = &r * r.transpose() * 2.0;
        let p = solve_discrete_lyapunov(&t, &w).unwrap();
        let resid = &p - (&t * &p * t.transpose() + &w);
        assert!(resid.amax() < 1e-12 * p.amax() * 9.0, "residual {}", resid.amax());
    }

    #[test]
    fn ar1_closed_form() {
        // Var of AR(1) = sigma2 / (1 - phi^2), standard closed form.
        let t = DMatrix::from_element(1, 1, 0.7);
        let w = DMatrix::from_element(1, 1, 1.0);
        let p = solve_discrete_lyapunov(&t, &w).unwrap();
        assert!((p[(0, 0)] - 1.0 / (1.0 - 0.49)).abs() < 1e-14);
    }
}
