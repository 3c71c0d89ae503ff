//! Abrupt changes of a member's bias (a sensor zero step), told from drift.
//!
//! The evidence is the member-minus-reference difference
//! d_t = y_i,t - r_t, where r_t is the precision-weighted mean of the
//! reference members' readings at t: the common process cancels, so a
//! process change (a setpoint change, a trip) cannot look like a step. At
//! each candidate time tau the difference in the window of half-width W
//! around tau is regressed on a level, a common slope and a step at tau
//!
//! ```text
//! d_s = alpha + gamma (s - tau) + beta 1{s >= tau} + e_s,    |s - tau| < W
//! ```
//!
//! and the generalised likelihood ratio statistic for beta = 0 is
//! z = beta_hat / se(beta_hat) (a GLR test for a change at a known time,
//! maximised over tau; Basseville & Nikiforov 1993, ch. 2 and 7, from
//! memory). Because the slope is in the regression, a drift (a ramp) does not
//! give a step: beta stays zero on any straight line. The noise standard
//! deviation of d is taken robustly from first differences (scaled median
//! absolute deviation / sqrt 2), and z is further divided by the robust
//! spread of all the z's when that exceeds 1, so autocorrelated or
//! heavy-tailed noise does not turn into steps. A step is declared at the
//! largest |z| >= `threshold` with |beta_hat| >= `min_size`; candidates
//! within W of it are removed and the search repeats (at most
//! [`MAX_JUMPS`] per member and window).
//!
//! Sums over each window come from prefix sums, so the scan is O(n).

use nalgebra::Matrix3;

use crate::model::robust_var;

/// Most steps looked for per member and run.
pub const MAX_JUMPS: usize = 4;

/// A detected step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Jump {
    /// Axis index of the first reading after the step.
    pub index: usize,
    /// Estimated size (tag units).
    pub size: f64,
    /// Standardised statistic.
    pub z: f64,
}

/// Searches `d` (NaN = missing) at times `s` (periods, increasing) for steps.
pub fn detect(d: &[f64], s: &[f64], half_window: f64, threshold: f64, min_size: f64) -> Vec<Jump> {
    let n = d.len();
    debug_assert_eq!(s.len(), n);
    // Robust noise scale of d from successive differences.
    let mut diffs = Vec::with_capacity(n);
    let mut last: Option<usize> = None;
    for t in 0..n {
        if d[t].is_nan() {
            continue;
        }
        if let Some(l) = last {
            if s[t] - s[l] <= 2.5 {
                diffs.push(d[t] - d[l]);
            }
        }
        last = Some(t);
    }
    let Some(var2) = robust_var(&mut diffs) else { return Vec::new() };
    let sigma2 = 0.5 * var2;
    if sigma2.is_nan() || sigma2 <= 0.0 {
        // The difference barely moves (most successive differences are equal
        // after quantisation): no noise scale to judge a step by.
        return Vec::new();
    }

    // Prefix sums over observed points: count, s, s^2, d, s d.
    let mut pc = vec![0.0; n + 1];
    let mut ps = vec![0.0; n + 1];
    let mut pss = vec![0.0; n + 1];
    let mut pd = vec![0.0; n + 1];
    let mut psd = vec![0.0; n + 1];
    for t in 0..n {
        let (c, x, y) = if d[t].is_nan() { (0.0, 0.0, 0.0) } else { (1.0, s[t], d[t]) };
        pc[t + 1] = pc[t] + c;
        ps[t + 1] = ps[t] + x;
        pss[t + 1] = pss[t] + x * x;
        pd[t + 1] = pd[t] + y;
        psd[t + 1] = psd[t] + x * y;
    }
    let min_count = (0.25 * half_window).max(3.0);
    let mut beta = vec![f64::NAN; n];
    let mut z = vec![f64::NAN; n];
    let (mut lo, mut hi) = (0usize, 0usize);
    for t in 0..n {
        while lo < t && s[lo] <= s[t] - half_window {
            lo += 1;
        }
        while hi < n && s[hi] < s[t] + half_window {
            hi += 1;
        }
        if d[t].is_nan() {
            continue;
        }
        let c0 = s[t];
        let sum = |p: &[f64], a: usize, b: usize| p[b] - p[a];
        let (cl, cr) = (sum(&pc, lo, t), sum(&pc, t, hi));
        if cl < min_count || cr < min_count {
            continue;
        }
        let c = cl + cr;
        // Sums in u = s - tau.
        let s1 = sum(&ps, lo, hi) - c * c0;
        let s2 = sum(&pss, lo, hi) - 2.0 * c0 * sum(&ps, lo, hi) + c * c0 * c0;
        let s1r = sum(&ps, t, hi) - cr * c0;
        let sd = sum(&pd, lo, hi);
        let sud = sum(&psd, lo, hi) - c0 * sd;
        let sdr = sum(&pd, t, hi);
        let xtx = Matrix3::new(c, s1, cr, s1, s2, s1r, cr, s1r, cr);
        let Some(inv) = xtx.try_inverse() else { continue };
        let b = inv[(2, 0)] * sd + inv[(2, 1)] * sud + inv[(2, 2)] * sdr;
        let v = sigma2 * inv[(2, 2)];
        if v > 0.0 && b.is_finite() {
            beta[t] = b;
            z[t] = b / v.sqrt();
        }
    }
    // Inflate by the robust spread of the statistics when it exceeds 1.
    let mut zs: Vec<f64> = z.iter().copied().filter(|v| v.is_finite()).collect();
    let spread = if zs.len() >= 50 { robust_var(&mut zs).map_or(1.0, f64::sqrt) } else { 1.0 };
    let inflate = spread.max(1.0);
    let mut out = Vec::new();
    let mut alive = vec![true; n];
    while out.len() < MAX_JUMPS {
        let mut best: Option<(usize, f64)> = None;
        for t in 0..n {
            let zt = z[t] / inflate;
            if alive[t] && zt.abs() >= threshold && beta[t].abs() >= min_size && best.is_none_or(|(_, b)| zt.abs() > b)
            {
                best = Some((t, zt.abs()));
            }
        }
        let Some((t, _)) = best else { break };
        out.push(Jump { index: t, size: beta[t], z: z[t] / inflate });
        for (k, a) in alive.iter_mut().enumerate() {
            if (s[k] - s[t]).abs() < half_window {
                *a = false;
            }
        }
    }
    out.sort_by_key(|j| j.index);
    out
}
