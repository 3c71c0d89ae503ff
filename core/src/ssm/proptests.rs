//! Property tests of the invariants every filter run must keep.

use nalgebra::{DMatrix, SymmetricEigen};
use proptest::prelude::*;

use super::tests::simulate;
use super::*;
use crate::rng::Rng;

fn min_eig(m: &DMatrix<f64>) -> f64 {
    SymmetricEigen::new(m.clone()).eigenvalues.iter().cloned().fold(f64::INFINITY, f64::min)
}

fn is_symmetric(m: &DMatrix<f64>) -> bool {
    (m - m.transpose()).amax() <= 1e-12 * m.amax().max(1.0)
}

/// A model from a spec and raw draws mapped into the valid parameter region.
fn model_from(spec: &str, raw: &[f64]) -> (ModelSpec, Vec<f64>) {
    let spec: ModelSpec = spec.parse().unwrap();
    let mut params: Vec<f64> = spec
        .params()
        .iter()
        .zip(raw.iter().cycle())
        .map(|((_, kind), &r)| match kind {
            ParamKind::Variance => 10f64.powf(r * 3.0 - 2.0), // 1e-2 .. 10
            _ => r * 1.6 - 0.8,
        })
        .collect();
    // Pull AR/MA blocks into the valid region through the transform.
    let kinds: Vec<ParamKind> = spec.params().into_iter().map(|(_, k)| k).collect();
    for want in [ParamKind::Ar, ParamKind::Ma] {
        let idx: Vec<usize> = (0..kinds.len()).filter(|&i| kinds[i] == want).collect();
        if let (Some(&s), n) = (idx.first(), idx.len()) {
            let u: Vec<f64> = params[s..s + n].to_vec();
            if want == ParamKind::Ar {
                arma::constrain_stationary(&u, &mut params[s..s + n]);
            } else {
                arma::constrain_invertible(&u, &mut params[s..s + n]);
            }
        }
    }
    (spec, params)
}

const SPECS: [&str; 5] = ["local-level", "local-trend", "local-level+arma(1,0)", "arma(2,1)", "local-trend+arma(1,1)"];

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn covariances_psd_and_smoothing_never_adds_variance(
        which in 0usize..SPECS.len(),
        raw in prop::collection::vec(0.0f64..1.0, 6),
        seed in any::<u64>(),
        miss in prop::collection::vec(0.0f64..1.0, 80),
    ) {
        let (spec, params) = model_from(SPECS[which], &raw);
        let model = spec.build(&params).unwrap();
        let mut rng = Rng::new(seed);
        let mut y = simulate(&model, 80, &mut rng);
        for (v, u) in y.iter_mut().zip(&miss) {
            if *u < 0.2 { *v = f64::NAN; }
        }
        let obs = Observations::univariate(&y);
        let f = filter(&model, &obs, &FilterOptions::default()).unwrap();
        let s = smooth(&model, &obs, &f);
        let m = model.state_dim();
        for t in 0..80 {
            let pp = filter::stored_matrix(&f.p_pred, t, m);
            let pf = filter::stored_matrix(&f.p_filt, t, m);
            let v = filter::stored_matrix(&s.cov, t, m);
            let scale = pp.amax().max(1.0);
            for (name, mat) in [("predicted", &pp), ("filtered", &pf), ("smoothed", &v)] {
                prop_assert!(is_symmetric(mat), "{} cov not symmetric at t={}", name, t);
                prop_assert!(min_eig(mat) >= -1e-9 * scale, "{} cov not PSD at t={}: {}", name, t, min_eig(mat));
            }
            // After the diffuse phase the filtered covariance is finite and
            // smoothing can only reduce it: P_{t|t} - V_t is PSD.
            if t >= f.diffuse_end {
                prop_assert!(min_eig(&(&pf - &v)) >= -1e-8 * scale, "smoothed > filtered at t={}", t);
            }
        }
        // The smoother at the last time equals the filter.
        let last = 79;
        if last >= f.diffuse_end {
            let af = filter::stored_vector(&f.a_filt, last, m);
            let as_ = filter::stored_vector(&s.state, last, m);
            prop_assert!((&af - &as_).amax() <= 1e-9 * af.amax().max(1.0));
            let pf = filter::stored_matrix(&f.p_filt, last, m);
            let v = filter::stored_matrix(&s.cov, last, m);
            prop_assert!((&pf - &v).amax() <= 1e-9 * pf.amax().max(1.0));
        }
    }

    #[test]
    fn all_missing_stretches_leave_the_likelihood_unchanged(
        which in 0usize..SPECS.len(),
        raw in prop::collection::vec(0.0f64..1.0, 6),
        seed in any::<u64>(),
        start in 5usize..40,
        len in 1usize..15,
        tail in 1usize..10,
    ) {
        let (spec, params) = model_from(SPECS[which], &raw);
        let model = spec.build(&params).unwrap();
        let mut rng = Rng::new(seed);
        let y = simulate(&model, 60, &mut rng);
        let base = filter(&model, &Observations::univariate(&y), &FilterOptions::loglik_only()).unwrap().loglik;
        // Missing rows appended at the end change nothing.
        let mut longer = y.clone();
        longer.extend(std::iter::repeat_n(f64::NAN, tail));
        let ll = filter(&model, &Observations::univariate(&longer), &FilterOptions::loglik_only()).unwrap().loglik;
        prop_assert!((ll - base).abs() <= 1e-10 * base.abs().max(1.0));
        // A missing stretch inside equals one long step over it.
        let mut holed = y.clone();
        for v in &mut holed[start..start + len] { *v = f64::NAN; }
        let dense = filter(&model, &Observations::univariate(&holed), &FilterOptions::loglik_only()).unwrap().loglik;
        let mut ys = Vec::new();
        let mut dt = Vec::new();
        for (t, v) in y.iter().enumerate() {
            if (start..start + len).contains(&t) { continue; }
            ys.push(*v);
            dt.push(if t + 1 == start { (len + 1) as f64 } else { 1.0 });
        }
        let sparse = Observations { y: &ys, p: 1, dt: Some(&dt), h_scale: None };
        let jumped = filter(&model, &sparse, &FilterOptions::loglik_only()).unwrap().loglik;
        prop_assert!((dense - jumped).abs() <= 1e-9 * dense.abs().max(1.0), "{} vs {}", dense, jumped);
    }

    /// constrain(unconstrain(phi)) returns phi to 1e-10; u itself comes back
    /// to 1e-6 only, since the inverse map scales rounding by 1/(1 - pacf^2)
    /// per lag (pacf = 0.98 at |u| = 5).
    #[test]
    fn stationarity_transform_roundtrips(u in prop::collection::vec(-5.0f64..5.0, 1..8)) {
        let mut phi = vec![0.0; u.len()];
        arma::constrain_stationary(&u, &mut phi);
        prop_assert!(arma::check_stationary(&phi).is_ok());
        let back = arma::unconstrain_stationary(&phi).unwrap();
        for (a, b) in u.iter().zip(&back) {
            prop_assert!((a - b).abs() <= 1e-6 * a.abs().max(1.0), "{} vs {}", a, b);
        }
        let mut again = vec![0.0; u.len()];
        arma::constrain_stationary(&back, &mut again);
        for (a, b) in phi.iter().zip(&again) {
            prop_assert!((a - b).abs() <= 1e-10 * a.abs().max(1.0), "{} vs {}", a, b);
        }
        let mut theta = vec![0.0; u.len()];
        arma::constrain_invertible(&u, &mut theta);
        prop_assert!(arma::check_invertible(&theta).is_ok());
        let back = arma::unconstrain_invertible(&theta).unwrap();
        for (a, b) in u.iter().zip(&back) {
            prop_assert!((a - b).abs() <= 1e-6 * a.abs().max(1.0));
        }
    }
}

/// Sample autocovariances of a long simulated ARMA series match the
/// theoretical ones (Brockwell & Davis, Introduction to Time Series and
/// Forecasting, §3.2) within five standard errors (Bartlett's formula).
#[test]
fn simulated_arma_autocovariances_match_theory() {
    let cases: [(&[f64], &[f64], f64); 3] =
        [(&[0.7], &[], 1.0), (&[0.5, -0.3], &[0.4], 2.0), (&[0.6], &[0.3, -0.2], 1.0)];
    for (k, (phi, theta, s2)) in cases.into_iter().enumerate() {
        let n = 200_000;
        let mut rng = Rng::new(100 + k as u64);
        let (x, _) = arma::simulate(phi, theta, s2, n, &mut rng).unwrap();
        let theory = arma::autocovariances(phi, theta, s2, 60).unwrap();
        let mean = x.iter().sum::<f64>() / n as f64;
        // Bartlett: Var(gamma_hat(h)) ~ (1/n) sum_j (gamma(j)^2 + gamma(j+h) gamma(j-h)); bounded by 2 sum gamma^2 / n.
        let sum_sq: f64 = theory[0] * theory[0] + 2.0 * theory[1..].iter().map(|g| g * g).sum::<f64>();
        let se = (2.0 * sum_sq / n as f64).sqrt();
        for h in 0..=5 {
            let g: f64 = (0..n - h).map(|t| (x[t] - mean) * (x[t + h] - mean)).sum::<f64>() / n as f64;
            assert!((g - theory[h]).abs() < 5.0 * se, "case {k} lag {h}: sample {g} vs theory {} (se {se})", theory[h]);
        }
    }
}

/// AR(1): gamma(h) = sigma2 phi^h / (1 - phi^2), the standard closed form.
#[test]
fn ar1_autocovariances_closed_form() {
    let g = arma::autocovariances(&[0.7], &[], 1.0, 10).unwrap();
    for (h, gh) in g.iter().enumerate() {
        let want = 0.7f64.powi(h as i32) / (1.0 - 0.49);
        assert!((gh - want).abs() < 1e-12, "lag {h}");
    }
}
