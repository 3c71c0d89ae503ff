//! The Hampel filter on plain slices: a reading is an outlier when it lies
//! more than `k` robust standard deviations from the median of the `window`
//! readings around it:
//!
//! ```text
//! m_j     = median(y_{s..s+w})
//! MAD_j   = median(|y_i - m_j|, i in s..s+w)
//! sigma_j = max(1.4826 MAD_j, min_sigma)
//! z_j     = (y_j - m_j) / sigma_j          outlier when |z_j| > k
//! ```
//!
//! with the window `s..s+w` of `w` (odd) readings centred on `j`, shifted
//! inwards at the two ends of the series so that every window holds `w`
//! readings. The constant 1.4826 = 1/Φ⁻¹(3/4) makes 1.4826·MAD estimate the
//! standard deviation of normal data (Rousseeuw & Croux 1993, JASA 88(424),
//! cited from memory; the test `mad_constant_is_the_normal_quartile` checks
//! the value by integrating the normal density).
//!
//! The window counts readings, not time: only the readings the caller marks
//! usable enter it (a rejected or inserted row is skipped), and across a gap
//! it joins the readings on both sides. Where the window's spread is zero (a
//! flat stretch, a stuck or heavily quantised signal) and `min_sigma` is 0,
//! no scale is known and the reading is not tested.
//!
//! Used by the example external plugin (`plugins/hampel-plugin`) and by the
//! same step linked into a host directly (the equivalence test and the
//! boundary-cost benchmark in `tests/`).

use serde::Deserialize;

/// 1/Φ⁻¹(3/4), the consistency constant of the MAD for normal data
/// (Rousseeuw & Croux 1993, JASA 88(424), cited from memory; checked by a
/// test that integrates the normal density).
pub const MAD_TO_SIGMA: f64 = 1.482_602_218_505_602;

/// What the step does with an outlier.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Action {
    /// Reject the reading (status `rejected`, fault `spike`, no value).
    #[default]
    Reject,
    /// Keep the reading and set fault `spike`.
    Flag,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawParams {
    window: Option<u64>,
    k: Option<f64>,
    action: Option<Action>,
    min_sigma: Option<f64>,
}

/// A configured Hampel filter.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Hampel {
    /// Readings per window, odd, 3 to [`Hampel::MAX_WINDOW`].
    pub window: usize,
    /// Threshold in robust standard deviations (> 0).
    pub k: f64,
    pub action: Action,
    /// Floor of the robust standard deviation, in the tag's units (>= 0).
    pub min_sigma: f64,
}

impl Default for Hampel {
    /// Window 7 (three readings each side) and k = 3: a value from memory of
    /// common defaults for the Hampel filter, not from a cited source.
    fn default() -> Self {
        Hampel { window: 7, k: 3.0, action: Action::Reject, min_sigma: 0.0 }
    }
}

/// Counts of one tag's pass.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Summary {
    /// Readings tested.
    pub tested: usize,
    /// Outliers found.
    pub outliers: usize,
    /// Readings not tested because their window had no spread.
    pub no_spread: usize,
    /// Usable readings, when fewer than a window (nothing was tested).
    pub too_few: Option<usize>,
}

impl Hampel {
    /// Largest window accepted.
    pub const MAX_WINDOW: usize = 10_001;

    /// The filter of a step's parameters (`window`, `k`, `action`,
    /// `min_sigma`; `null` gives the defaults). The message names the
    /// parameter that is wrong.
    pub fn from_params(params: &serde_json::Value) -> Result<Hampel, String> {
        let raw = if params.is_null() {
            RawParams::default()
        } else {
            RawParams::deserialize(params).map_err(|e| e.to_string())?
        };
        let d = Hampel::default();
        let window = raw.window.unwrap_or(d.window as u64);
        if window < 3 || window % 2 == 0 || window > Hampel::MAX_WINDOW as u64 {
            return Err(format!("window: {window}: write an odd number of readings from 3 to {}", Hampel::MAX_WINDOW));
        }
        let k = raw.k.unwrap_or(d.k);
        if !(k.is_finite() && k > 0.0) {
            return Err(format!("k: {k}: write a finite number > 0 (robust standard deviations)"));
        }
        let min_sigma = raw.min_sigma.unwrap_or(d.min_sigma);
        if !(min_sigma.is_finite() && min_sigma >= 0.0) {
            return Err(format!("min_sigma: {min_sigma}: write a finite number >= 0, in the tag's units"));
        }
        Ok(Hampel { window: window as usize, k, action: raw.action.unwrap_or_default(), min_sigma })
    }

    /// Tests the readings `x[i]` of the rows where `usable(i)` (and `x[i]` is
    /// finite); for each such row where `testable(i)` and |z| > k, calls
    /// `outlier(i, z)`. Rows are visited in order.
    pub fn detect(
        &self,
        x: &[f64],
        usable: impl Fn(usize) -> bool,
        testable: impl Fn(usize) -> bool,
        mut outlier: impl FnMut(usize, f64),
    ) -> Summary {
        let mut rows = Vec::with_capacity(x.len());
        let mut y = Vec::with_capacity(x.len());
        for (i, &v) in x.iter().enumerate() {
            if v.is_finite() && usable(i) {
                rows.push(i);
                y.push(v);
            }
        }
        let (m, w, h) = (y.len(), self.window, self.window / 2);
        let mut summary = Summary::default();
        if m < w {
            summary.too_few = Some(m);
            return summary;
        }
        let mut sorted: Vec<f64> = y[..w].to_vec();
        sorted.sort_by(f64::total_cmp);
        let mut start = 0;
        for j in 0..m {
            // The window of j: centred, shifted inwards at the ends.
            let s = j.saturating_sub(h).min(m - w);
            while start < s {
                // Slide by one: drop y[start], take in y[start + w].
                let out = y[start];
                let p = sorted.partition_point(|&a| a < out);
                let inn = y[start + w];
                let q = sorted.partition_point(|&a| a < inn);
                if q <= p {
                    sorted.copy_within(q..p, q + 1);
                    sorted[q] = inn;
                } else {
                    // `inn` goes after the removed slot: shift left by one.
                    sorted.copy_within(p + 1..q, p);
                    sorted[q - 1] = inn;
                }
                start += 1;
            }
            if !testable(rows[j]) {
                continue;
            }
            let med = sorted[h];
            let sigma = (MAD_TO_SIGMA * mad_of_sorted(&sorted, med)).max(self.min_sigma);
            if sigma <= 0.0 {
                summary.no_spread += 1;
                continue;
            }
            summary.tested += 1;
            let z = (y[j] - med) / sigma;
            if z.abs() > self.k {
                summary.outliers += 1;
                outlier(rows[j], z);
            }
        }
        summary
    }
}

/// The median of |s_i - med| over a sorted window of odd length 2h+1 whose
/// median is `med = s[h]`: the distances grow outwards on both sides of h,
/// so the h-th smallest (counting d_h = 0 as the 0th) is found by merging
/// the two sides for h steps.
fn mad_of_sorted(s: &[f64], med: f64) -> f64 {
    let h = s.len() / 2;
    let (mut l, mut r) = (h, h + 1); // next left is s[l - 1], next right is s[r]
    let mut last = 0.0;
    for _ in 0..h {
        let dl = if l > 0 { med - s[l - 1] } else { f64::INFINITY };
        let dr = if r < s.len() { s[r] - med } else { f64::INFINITY };
        if dl <= dr {
            last = dl;
            l -= 1;
        } else {
            last = dr;
            r += 1;
        }
    }
    last
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    /// Median and MAD by sorting, the textbook way.
    fn naive(y: &[f64]) -> (f64, f64) {
        let mut s = y.to_vec();
        s.sort_by(f64::total_cmp);
        let med = s[s.len() / 2];
        let mut d: Vec<f64> = s.iter().map(|v| (v - med).abs()).collect();
        d.sort_by(f64::total_cmp);
        (med, d[d.len() / 2])
    }

    /// A small deterministic generator (64-bit LCG, Knuth's MMIX constants,
    /// from memory) so this crate needs no dependency for its tests.
    fn lcg(seed: u64) -> impl FnMut() -> f64 {
        let mut s = seed;
        move || {
            s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64
        }
    }

    #[test]
    fn sliding_window_agrees_with_sorting_each_window() {
        let mut u = lcg(7);
        for &w in &[3usize, 5, 7, 11, 31] {
            // Quantised values so that ties occur.
            let y: Vec<f64> = (0..400).map(|_| (u() * 20.0).round() / 4.0).collect();
            let f = Hampel { window: w, k: 2.0, min_sigma: 0.0, ..Hampel::default() };
            let mut got = Vec::new();
            f.detect(&y, |_| true, |_| true, |i, z| got.push((i, z)));
            let mut want = Vec::new();
            for j in 0..y.len() {
                let s = j.saturating_sub(w / 2).min(y.len() - w);
                let (med, mad) = naive(&y[s..s + w]);
                let sigma = MAD_TO_SIGMA * mad;
                if sigma > 0.0 && ((y[j] - med) / sigma).abs() > 2.0 {
                    want.push((j, (y[j] - med) / sigma));
                }
            }
            assert_eq!(got, want, "window {w}");
            assert!(!want.is_empty());
        }
    }

    #[test]
    fn spikes_are_found_and_unusable_rows_skipped() {
        // A ramp with bounded noise: |z| stays below 2 away from the spikes.
        let mut u = lcg(3);
        let mut y: Vec<f64> = (0..200).map(|i| 50.0 + 0.2 * i as f64 + 0.1 * (u() - 0.5)).collect();
        y[40] += 25.0;
        y[41] = f64::NAN; // not finite: never in a window
        y[120] -= 30.0;
        y[150] += 40.0; // unusable: neither tested nor in a window
        let f = Hampel::default();
        let mut got = Vec::new();
        let s = f.detect(&y, |i| i != 150, |_| true, |i, z| got.push((i, z)));
        let rows: Vec<usize> = got.iter().map(|g| g.0).collect();
        assert_eq!(rows, [40, 120]);
        assert!(got[0].1 > 3.0 && got[1].1 < -3.0);
        assert_eq!((s.tested, s.outliers, s.no_spread, s.too_few), (198, 2, 0, None));
        // Rows not testable are still in the windows but never reported.
        let mut got = Vec::new();
        f.detect(&y, |i| i != 150, |i| i != 40, |i, _| got.push(i));
        assert_eq!(got, [120]);
    }

    #[test]
    fn flat_windows_and_short_series() {
        let mut y = vec![5.0; 20];
        y[10] = 6.0;
        let f = Hampel::default();
        let mut n = 0;
        let s = f.detect(&y, |_| true, |_| true, |_, _| n += 1);
        assert_eq!((n, s.no_spread), (0, 20), "no spread, no test");
        let f = Hampel { min_sigma: 0.1, ..f };
        let mut got = Vec::new();
        f.detect(&y, |_| true, |_| true, |i, z| got.push((i, z)));
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].0, 10);
        assert!((got[0].1 - 10.0).abs() < 1e-9);
        let s = f.detect(&y[..6], |_| true, |_| true, |_, _| {});
        assert_eq!(s.too_few, Some(6));
    }

    #[test]
    fn parameters() {
        assert_eq!(Hampel::from_params(&serde_json::Value::Null).unwrap(), Hampel::default());
        let h = Hampel::from_params(&serde_json::json!({"window": 11, "k": 4.5, "action": "flag"})).unwrap();
        assert_eq!((h.window, h.k, h.action), (11, 4.5, Action::Flag));
        for (p, msg) in [
            (serde_json::json!({"window": 6}), "window: 6: write an odd number"),
            (serde_json::json!({"window": 1}), "window: 1"),
            (serde_json::json!({"k": 0}), "k: 0: write a finite number > 0"),
            (serde_json::json!({"min_sigma": -1}), "min_sigma: -1"),
            (serde_json::json!({"action": "drop"}), "unknown variant `drop`"),
            (serde_json::json!({"windw": 7}), "unknown field `windw`"),
        ] {
            let e = Hampel::from_params(&p).unwrap_err();
            assert!(e.contains(msg), "{p}: {e}");
        }
    }

    /// Φ(1/1.4826) = 3/4, with Φ integrated by Simpson's rule (an
    /// independent check of the constant).
    #[test]
    fn mad_constant_is_the_normal_quartile() {
        let b = 1.0 / MAD_TO_SIGMA;
        let n = 2000;
        let h = b / n as f64;
        let phi = |t: f64| (-0.5 * t * t).exp() / (2.0 * std::f64::consts::PI).sqrt();
        let mut s = phi(0.0) + phi(b);
        for i in 1..n {
            s += if i % 2 == 1 { 4.0 } else { 2.0 } * phi(i as f64 * h);
        }
        let cdf = 0.5 + s * h / 3.0;
        assert!((cdf - 0.75).abs() < 1e-12, "{cdf}");
    }
}
