//! Cross-checks of the recursions against a brute-force oracle (the joint
//! Gaussian of all states and observations, conditioned directly) and
//! against each other (every path, steady state on and off, exact diffuse
//! against a large-kappa approximation).

use nalgebra::{DMatrix, DVector};

use super::*;
use crate::rng::Rng;

/// Simulate y from a model with a known initial state a1 (P1 ignored).
pub(crate) fn simulate(model: &StateSpace, n: usize, rng: &mut Rng) -> Vec<f64> {
    let m = model.state_dim();
    let p = model.obs_dim();
    let rqr = model.rqr();
    let chol = (&rqr + DMatrix::identity(m, m) * 1e-300).cholesky();
    let lq = chol.map(|c| c.l()).unwrap_or_else(|| DMatrix::from_diagonal(&rqr.diagonal().map(|x| x.max(0.0).sqrt())));
    let mut a = model.a1.clone();
    let mut y = Vec::with_capacity(n * p);
    for _ in 0..n {
        for i in 0..p {
            let mean = (model.z.row(i) * &a)[0] + model.d[i];
            y.push(mean + model.h[i].sqrt() * rng.normal());
        }
        let e = DVector::from_fn(m, |_, _| rng.normal());
        a = &model.t * a + &model.c + &lq * e;
    }
    y
}

#[allow(clippy::needless_range_loop)] // index arithmetic mirrors the block formulas
/// Oracle: smoothed means/variances and log-likelihood by conditioning the
/// stacked Gaussian vector directly. Needs a proper (non-diffuse) prior.
fn oracle(model: &StateSpace, y: &[f64]) -> (Vec<f64>, Vec<f64>, f64) {
    let m = model.state_dim();
    let p = model.obs_dim();
    let n = y.len() / p;
    let rqr = model.rqr();
    // Means and covariances of a_1..a_n.
    let mut mean_a = vec![model.a1.clone()];
    let mut cov: Vec<Vec<DMatrix<f64>>> = vec![vec![DMatrix::zeros(m, m); n]; n];
    cov[0][0] = model.p1_star.clone();
    for t in 1..n {
        mean_a.push(&model.t * &mean_a[t - 1] + &model.c);
        for s in 0..t {
            // Cov(a_t, a_s) = T Cov(a_{t-1}, a_s)
            cov[t][s] = &model.t * &cov[t - 1][s];
            cov[s][t] = cov[t][s].transpose();
        }
        cov[t][t] = &model.t * &cov[t - 1][t - 1] * model.t.transpose() + &rqr;
    }
    let obs_idx: Vec<(usize, usize)> =
        (0..n).flat_map(|t| (0..p).map(move |i| (t, i))).filter(|&(t, i)| !y[t * p + i].is_nan()).collect();
    let k = obs_idx.len();
    let zrow = |i: usize| model.z.row(i).into_owned();
    let mut syy = DMatrix::zeros(k, k);
    let mut my = DVector::zeros(k);
    let mut yv = DVector::zeros(k);
    for (a, &(t, i)) in obs_idx.iter().enumerate() {
        my[a] = (zrow(i) * &mean_a[t])[0] + model.d[i];
        yv[a] = y[t * p + i];
        for (b, &(s, j)) in obs_idx.iter().enumerate() {
            syy[(a, b)] = (zrow(i) * &cov[t][s] * zrow(j).transpose())[0];
            if a == b {
                syy[(a, b)] += model.h[i];
            }
        }
    }
    let chol = syy.clone().cholesky().expect("Syy positive definite");
    let resid = &yv - &my;
    let alpha = chol.solve(&resid);
    let logdet = 2.0 * chol.l().diagonal().iter().map(|x| x.ln()).sum::<f64>();
    let ll = -0.5 * (k as f64 * filter::LN_2PI + logdet + resid.dot(&alpha));
    let mut sm = vec![0.0; n * m];
    let mut sv = vec![0.0; n * m * m];
    for t in 0..n {
        // Cov(a_t, y_obs): m x k
        let mut say = DMatrix::zeros(m, k);
        for (b, &(s, j)) in obs_idx.iter().enumerate() {
            say.set_column(b, &(&cov[t][s] * zrow(j).transpose()));
        }
        let mt = &mean_a[t] + &say * &alpha;
        let vt = &cov[t][t] - &say * chol.solve(&say.transpose());
        sm[t * m..(t + 1) * m].copy_from_slice(mt.as_slice());
        sv[t * m * m..(t + 1) * m * m].copy_from_slice(vt.as_slice());
    }
    (sm, sv, ll)
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs()).max(1.0)
}

fn assert_all_close(what: &str, a: &[f64], b: &[f64], rel: f64) {
    assert_eq!(a.len(), b.len(), "{what}: lengths");
    for (i, (x, y)) in a.iter().zip(b).enumerate() {
        assert!(close(*x, *y, rel), "{what}[{i}]: {x} vs {y}");
    }
}

/// A model with every feature: two observation elements, ARMA block, intercepts.
fn rich_model() -> StateSpace {
    let spec: ModelSpec = "local-level+arma(2,1)".parse().unwrap();
    let mut model = spec.build(&[0.5, 0.2, 0.6, -0.2, 0.3, 1.0]).unwrap();
    // Make the level's initial state proper for the oracle.
    model.p1_inf.fill(0.0);
    model.p1_star[(0, 0)] = 4.0;
    model.a1[0] = 10.0;
    model
}

#[test]
fn smoother_and_loglik_match_the_oracle_on_every_path() {
    let model = rich_model();
    let mut rng = Rng::new(11);
    let mut y = simulate(&model, 40, &mut rng);
    for t in [3, 4, 5, 17, 30] {
        y[t] = f64::NAN;
    }
    let (sm, sv, ll) = oracle(&model, &y);
    for path in [Path::Fixed, Path::General] {
        for steady_tol in [0.0, 1e-11] {
            let obs = Observations::univariate(&y);
            let f = filter(&model, &obs, &FilterOptions { store: true, steady_tol, path, loglik: true }).unwrap();
            assert!(close(f.loglik, ll, 1e-10), "{path:?}: loglik {} vs oracle {ll}", f.loglik);
            let s = smooth(&model, &obs, &f);
            assert_all_close("smoothed state", &s.state, &sm, 1e-8);
            assert_all_close("smoothed cov", &s.cov, &sv, 1e-8);
        }
    }
}

#[test]
fn scalar_path_matches_the_oracle_including_irregular_steps() {
    let spec: ModelSpec = "local-level".parse().unwrap();
    let mut model = spec.build(&[2.0, 0.3]).unwrap();
    model.p1_inf.fill(0.0);
    model.p1_star[(0, 0)] = 3.0;
    model.a1[0] = 5.0;
    let mut rng = Rng::new(3);
    let mut y = simulate(&model, 30, &mut rng);
    y[7] = f64::NAN;
    let (sm, sv, ll) = oracle(&model, &y);
    for path in [Path::Scalar, Path::Fixed, Path::General] {
        let obs = Observations::univariate(&y);
        let f = filter(&model, &obs, &FilterOptions { path, ..Default::default() }).unwrap();
        assert_eq!(f.path, path);
        assert!(close(f.loglik, ll, 1e-10), "{path:?}: {} vs {ll}", f.loglik);
        let s = smooth(&model, &obs, &f);
        assert_all_close("state", &s.state, &sm, 1e-9);
        assert_all_close("cov", &s.cov, &sv, 1e-9);
    }
    // Irregular steps: a step of 3 periods equals two missing rows in between.
    let grid: Vec<f64> = vec![1.0, f64::NAN, f64::NAN, 2.5, 2.0, f64::NAN, 3.0, 2.8];
    let dense = Observations::univariate(&grid);
    let sparse_y = [1.0, 2.5, 2.0, 3.0, 2.8];
    let dt = [3.0, 1.0, 2.0, 1.0, 1.0];
    let sparse = Observations { y: &sparse_y, p: 1, dt: Some(&dt), h_scale: None };
    for path in [Path::Scalar, Path::General] {
        let opts = FilterOptions { path, ..Default::default() };
        let fd = filter(&model, &dense, &opts).unwrap();
        let fs = filter(&model, &sparse, &opts).unwrap();
        assert!(close(fd.loglik, fs.loglik, 1e-12));
        let sd = smooth(&model, &dense, &fd);
        let ss = smooth(&model, &sparse, &fs);
        for (k, t) in [0usize, 3, 4, 6, 7].iter().enumerate() {
            assert!(close(sd.state[*t], ss.state[k], 1e-12));
            assert!(close(sd.cov[*t], ss.cov[k], 1e-12));
        }
    }
}

#[test]
fn multivariate_with_partly_missing_rows_matches_the_oracle() {
    // Two transmitters on one process: y_i = x + b_i + e_i (common level + fixed offsets).
    let z = DMatrix::from_row_slice(2, 3, &[1.0, 1.0, 0.0, 1.0, 0.0, 1.0]);
    let t = DMatrix::identity(3, 3);
    let r = DMatrix::identity(3, 3);
    let q = DMatrix::from_diagonal(&DVector::from_vec(vec![0.5, 0.01, 0.02]));
    let model = StateSpace::new(
        z,
        DVector::from_vec(vec![0.3, 0.6]),
        t,
        r,
        q,
        DVector::from_vec(vec![50.0, 0.0, 0.0]),
        DMatrix::from_diagonal(&DVector::from_vec(vec![10.0, 1.0, 1.0])),
        DMatrix::zeros(3, 3),
    );
    let mut rng = Rng::new(5);
    let mut y = simulate(&model, 25, &mut rng);
    y[2 * 2] = f64::NAN; // first element at t = 2
    y[9 * 2 + 1] = f64::NAN; // second element at t = 9
    y[14 * 2] = f64::NAN;
    y[14 * 2 + 1] = f64::NAN; // both at t = 14
    let (sm, sv, ll) = oracle(&model, &y);
    for path in [Path::Fixed, Path::General] {
        let obs = Observations { y: &y, p: 2, dt: None, h_scale: None };
        let f = filter(&model, &obs, &FilterOptions { path, ..Default::default() }).unwrap();
        assert!(close(f.loglik, ll, 1e-10), "{} vs {ll}", f.loglik);
        let s = smooth(&model, &obs, &f);
        assert_all_close("state", &s.state, &sm, 1e-8);
        assert_all_close("cov", &s.cov, &sv, 1e-8);
    }
}

/// Exact diffuse against a proper prior with a huge variance, conditioned
/// directly by the oracle (a filter run with kappa = 1e7 itself loses about
/// 1e-2 to cancellation in P N P at t = 1, which is why the exact treatment
/// exists): the smoothed states and variances agree, and the log-likelihoods
/// differ by the known kappa terms.
#[test]
fn exact_diffuse_agrees_with_large_kappa() {
    for spec in ["local-level", "local-trend", "local-level+arma(1,1)", "const+arma(2,0)"] {
        let spec: ModelSpec = spec.parse().unwrap();
        let params: Vec<f64> = spec
            .params()
            .iter()
            .map(|(n, _)| match n.as_str() {
                "phi.1" => 0.5,
                "phi.2" => -0.2,
                "theta.1" => 0.3,
                "sigma2.slope" => 0.01,
                _ => 1.0,
            })
            .collect();
        let exact = spec.build(&params).unwrap();
        let mut rng = Rng::new(21);
        let mut y: Vec<f64> = simulate(&exact, 40, &mut rng).iter().map(|v| v + 100.0).collect();
        y[1] = f64::NAN;
        y[20] = f64::NAN;
        let kappa = 1e7;
        let mut approx = exact.clone();
        approx.p1_star += &exact.p1_inf * kappa;
        approx.p1_inf.fill(0.0);
        let (sm, sv, ll) = oracle(&approx, &y);
        let m = exact.state_dim();
        for path in [Path::Auto, Path::General] {
            let obs = Observations::univariate(&y);
            let fe = filter(&exact, &obs, &FilterOptions { path, ..Default::default() }).unwrap();
            let se = smooth(&exact, &obs, &fe);
            for t in 0..40 {
                let (a, b) = (se.signal(&exact, t, 0), (0..m).map(|j| exact.z[(0, j)] * sm[t * m + j]).sum::<f64>());
                assert!(close(a, b, 1e-6), "{spec} t={t}: signal {a} vs {b}");
                let zv = DVector::from_fn(m, |j, _| exact.z[(0, j)]);
                let vo = (zv.transpose() * DMatrix::from_column_slice(m, m, &sv[t * m * m..(t + 1) * m * m]) * &zv)[0];
                let ve = se.signal_var(&exact, t, 0);
                assert!(close(ve, vo, 1e-4), "{spec} t={t}: signal var {ve} vs {vo}");
            }
            // A diffuse term is -1/2 (log 2 pi + log(kappa F_inf)) as kappa -> inf;
            // the diffuse likelihood keeps -1/2 (log 2 pi + log F_inf) (DK eq. 7.4).
            let extra = 0.5 * kappa.ln() * fe.diffuse.len() as f64;
            assert!(close(fe.loglik, ll + extra, 1e-5), "{spec}: {} vs {}", fe.loglik, ll + extra);
            assert_eq!(fe.diffuse.len(), spec.n_diffuse());
        }
    }
}

#[test]
fn local_trend_fixed_and_general_paths_agree() {
    let spec: ModelSpec = "local-trend".parse().unwrap();
    let model = spec.build(&[4.0, 0.5, 0.01]).unwrap();
    let mut rng = Rng::new(8);
    let mut y = simulate(&model, 500, &mut rng);
    for t in (100..500).step_by(37) {
        y[t] = f64::NAN;
    }
    let obs = Observations::univariate(&y);
    let ff = filter(&model, &obs, &FilterOptions { path: Path::Fixed, ..Default::default() }).unwrap();
    let fg = filter(&model, &obs, &FilterOptions { path: Path::General, steady_tol: 0.0, store: true, loglik: true })
        .unwrap();
    assert!(ff.steady_from.is_some(), "the steady state should be reached");
    assert!(close(ff.loglik, fg.loglik, 1e-9));
    let sf = smooth(&model, &obs, &ff);
    let sg = smooth(&model, &obs, &fg);
    assert_all_close("state", &sf.state, &sg.state, 1e-8);
    assert_all_close("cov", &sf.cov, &sg.cov, 1e-7);
}

#[test]
fn arma_first_state_reproduces_the_recursion() {
    // With the shocks known, a_{t+1} = T a_t + R e gives x_t = sum phi x + e + sum theta e exactly.
    let (phi, theta) = ([0.5, -0.3, 0.1], [0.4, 0.2]);
    let (t, r) = arma::companion(&phi, &theta);
    let mut rng = Rng::new(4);
    let e: Vec<f64> = (0..200).map(|_| rng.normal()).collect();
    let mut a = DVector::zeros(t.nrows());
    let mut x = vec![];
    for &et in &e {
        a = &t * a + r.column(0) * et;
        x.push(a[0]);
    }
    for n in 3..200 {
        let want = phi[0] * x[n - 1]
            + phi[1] * x[n - 2]
            + phi[2] * x[n - 3]
            + e[n]
            + theta[0] * e[n - 1]
            + theta[1] * e[n - 2];
        assert!((x[n] - want).abs() < 1e-12, "t={n}");
    }
}

/// The whole-period rule by binary powering equals k single steps, and a
/// gap of a day at one-second sampling costs no more than a few products.
#[test]
fn whole_period_steps_match_repeated_single_steps() {
    let spec: ModelSpec = "local-level+arma(2,1)".parse().unwrap();
    let model = spec.build(&[0.5, 0.2, 0.6, -0.2, 0.3, 1.0]).unwrap();
    let m = model.state_dim();
    let mut sys = model.step_system();
    for k in [1usize, 2, 3, 7, 16, 33] {
        model.system_for_step(k as f64, &mut sys);
        let (mut t, mut s) = (DMatrix::<f64>::identity(m, m), DMatrix::<f64>::zeros(m, m));
        let rqr = model.rqr();
        for _ in 0..k {
            s = &model.t * s * model.t.transpose() + &rqr;
            t = &model.t * t;
        }
        // The level block follows its closed form (q * dt) and agrees at whole k.
        assert!((&sys.t - &t).amax() < 1e-12, "T^{k}");
        assert!((&sys.rqr - &s).amax() < 1e-12 * s.amax().max(1.0), "S_{k}");
    }
    model.system_for_step(86_400.0, &mut sys);
    assert!(sys.rqr.iter().all(|v| v.is_finite()));
    assert!((sys.rqr[(0, 0)] - 0.2 * 86_400.0).abs() < 1e-6);
}

#[test]
fn two_state_loop_matches_the_matrix_code() {
    // A level with an AR(1): two states, one element, the level diffuse.
    // Missing readings, uncertain ones (H weight), gaps of 3 and 7 periods
    // (each length twice, so the cached gap system is used), and a stretch
    // long enough for the steady state.
    let spec: ModelSpec = "local-level+arma(1,0)".parse().unwrap();
    let model = spec.build(&[0.04, 0.001, 0.95, 0.02]).unwrap();
    let mut rng = Rng::new(5);
    let n = 3000;
    let y_full = simulate(&model, n, &mut rng);
    let mut y = y_full.clone();
    for t in [10, 11, 12, 400, 1777] {
        y[t] = f64::NAN;
    }
    let mut w = vec![1.0; n];
    for t in [20, 21, 900, 2500] {
        w[t] = 4.0;
    }
    let mut dt = vec![1.0; n];
    for (t, d) in [(50, 3.0), (60, 7.0), (1200, 3.0), (2900, 7.0)] {
        dt[t] = d;
    }
    for gaps in [false, true] {
        let obs = Observations { y: &y, p: 1, dt: gaps.then_some(&dt[..]), h_scale: Some(&w) };
        for steady_tol in [0.0, 1e-11] {
            let run =
                |path| filter(&model, &obs, &FilterOptions { store: true, steady_tol, path, loglik: true }).unwrap();
            let (fast, general) = (run(Path::Fixed), run(Path::General));
            assert_eq!(fast.path, Path::Fixed);
            assert!(close(fast.loglik, general.loglik, 1e-12), "loglik {} vs {}", fast.loglik, general.loglik);
            assert_eq!(fast.nobs, general.nobs);
            assert_eq!(fast.diffuse_end, general.diffuse_end);
            assert_eq!(fast.steady_from, general.steady_from, "gaps {gaps}, tol {steady_tol}");
            if steady_tol > 0.0 {
                assert!(fast.steady_from.is_some(), "the steady state should be reached");
            }
            assert_eq!(fast.kind, general.kind);
            // Missing readings have NaN innovations on both paths.
            let finite = |x: &[f64]| x.iter().map(|v| if v.is_nan() { 0.0 } else { *v }).collect::<Vec<_>>();
            assert_eq!(
                fast.v.iter().map(|v| v.is_nan()).collect::<Vec<_>>(),
                general.v.iter().map(|v| v.is_nan()).collect::<Vec<_>>()
            );
            assert_all_close("v", &finite(&fast.v), &finite(&general.v), 1e-9);
            assert_all_close("f", &finite(&fast.f), &finite(&general.f), 1e-9);
            assert_all_close("k", &fast.k, &general.k, 1e-9);
            assert_all_close("a_filt", &fast.a_filt, &general.a_filt, 1e-9);
            assert_all_close("p_filt", &fast.p_filt, &general.p_filt, 1e-9);
            let smooth_all = |f: &FilterOutput| {
                let mut s = SmootherOutput { keep_aux: true, keep_del: true, ..Default::default() };
                smooth_into(&model, &obs, f, &mut s);
                s
            };
            let (sf, sg) = (smooth_all(&fast), smooth_all(&general));
            assert_all_close("smoothed state", &sf.state, &sg.state, 1e-9);
            assert_all_close("smoothed cov", &sf.cov, &sg.cov, 1e-8);
            assert_all_close("r", &sf.r, &sg.r, 1e-8);
            assert_all_close("N", &sf.n_cum, &sg.n_cum, 1e-8);
            assert_eq!(sf.del.iter().filter(|d| d.is_finite()).count(), fast.nobs);
            assert_all_close("deletion residuals", &finite(&sf.del), &finite(&sg.del), 1e-8);
        }
    }
}

/// One model per filter and smoother path: scalar (local level), two
/// states (level + AR(1), the plain-number loops after the diffuse phase)
/// and three states (level + AR(2), the matrix loops).
const ONE_EACH_PATH: [(&str, &[f64]); 3] = [
    ("local-level", &[4.0, 0.3]),
    ("local-level+arma(1,0)", &[0.04, 0.001, 0.95, 0.02]),
    ("local-level+arma(2,0)", &[0.04, 0.001, 0.6, 0.2, 0.02]),
];

#[test]
fn the_lean_smoother_keeps_exactly_what_the_full_one_gives() {
    // One model per path, with missing and uncertain readings and gaps,
    // with and without the steady state. The lean arrays must equal, bit for bit, the signal,
    // its variance and the auxiliary residuals computed from the full ones
    // (the signal and its variance to rounding on the two-state path).
    for (text, params) in ONE_EACH_PATH {
        let spec: ModelSpec = text.parse().unwrap();
        let model = spec.build(params).unwrap();
        let mut rng = Rng::new(11);
        let n = 1500;
        let mut y = simulate(&model, n, &mut rng);
        for t in [0, 7, 8, 300, 1001] {
            y[t] = f64::NAN;
        }
        let mut w = vec![1.0; n];
        for t in [20, 500, 1200] {
            w[t] = 4.0;
        }
        let mut dt = vec![1.0; n];
        for (t, d) in [(40, 3.0), (800, 7.0)] {
            dt[t] = d;
        }
        let obs = Observations { y: &y, p: 1, dt: Some(&dt), h_scale: Some(&w) };
        for steady_tol in [0.0, 1e-11] {
            let f = filter(&model, &obs, &FilterOptions { store: true, steady_tol, path: Path::Auto, loglik: true })
                .unwrap();
            let run = |lean| {
                let mut s = SmootherOutput { keep_aux: true, keep_del: true, lean, ..Default::default() };
                smooth_into(&model, &obs, &f, &mut s);
                s
            };
            let (full, lean) = (run(false), run(true));
            let m = model.state_dim();
            assert!(lean.lean && lean.state.is_empty() && lean.cov.is_empty(), "{text}: full arrays left in");
            assert!(lean.r.is_empty() && lean.n_cum.is_empty());
            let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
            let mean: Vec<f64> = (0..n).map(|t| full.signal(&model, t, 0)).collect();
            let var: Vec<f64> = (0..n).map(|t| full.signal_var(&model, t, 0)).collect();
            if m == 2 {
                // The two-state loop computes the lean signal from w = P z'
                // (z a + d + w'r and z P z' - w'N w) instead of through the
                // full state and covariance: the same values up to rounding.
                for t in 0..n {
                    let (a, b) = (lean.sig_mean[t], mean[t]);
                    assert!(
                        (a - b).abs() <= 1e-12 * (1.0 + b.abs()),
                        "{text}, tol {steady_tol}: signal at {t}: {a} vs {b}"
                    );
                    let (a, b) = (lean.sig_var[t], var[t]);
                    assert!(
                        (a - b).abs() <= 1e-10 * b.abs().max(1e-3),
                        "{text}, tol {steady_tol}: variance at {t}: {a} vs {b}"
                    );
                }
            } else {
                assert_eq!(bits(&lean.sig_mean), bits(&mean), "{text}, tol {steady_tol}: signal");
                assert_eq!(bits(&lean.sig_var), bits(&var), "{text}, tol {steady_tol}: signal variance");
            }
            assert_eq!(bits(&lean.del), bits(&full.del), "{text}: deletion residuals");
            let mut finite_aux = 0;
            for t in 0..n - 1 {
                for j in 0..m {
                    let (a, b) = (lean.state_aux(t, j), full.state_aux(t, j));
                    assert_eq!(a.to_bits(), b.to_bits(), "{text}: aux at {t}, state {j}");
                    finite_aux += usize::from(a.is_finite());
                }
            }
            assert!(finite_aux > n - 20, "{text}: too few auxiliary residuals ({finite_aux})");
            // The same as the values read back through the public accessors.
            assert_eq!(lean.signal(&model, 5, 0).to_bits(), mean[5].to_bits());
        }
    }
}

/// A model of each path of [`ONE_EACH_PATH`] with 800 of its own values
/// (two of them missing), drawn with `seed`.
fn one_each_path_with_gaps(seed: u64) -> Vec<(&'static str, StateSpace, Vec<f64>)> {
    ONE_EACH_PATH
        .iter()
        .map(|&(text, params)| {
            let model = text.parse::<ModelSpec>().unwrap().build(params).unwrap();
            let mut y = simulate(&model, 800, &mut Rng::new(seed));
            y[5] = f64::NAN;
            y[400] = f64::NAN;
            (text, model, y)
        })
        .collect()
}

#[test]
fn a_run_without_the_filtered_arrays_smooths_the_same() {
    // `skip_filtered` leaves a_filt and p_filt empty and changes nothing
    // else, on every path (scalar, two states, matrices).
    for (text, model, y) in one_each_path_with_gaps(3) {
        let obs = Observations { y: &y, p: 1, dt: None, h_scale: None };
        let full = filter(&model, &obs, &FilterOptions::default()).unwrap();
        let mut lean = FilterOutput { skip_filtered: true, ..Default::default() };
        filter_into(&model, &obs, &FilterOptions::default(), &mut lean).unwrap();
        assert!(lean.a_filt.is_empty() && lean.p_filt.is_empty(), "{text}");
        assert!(!full.a_filt.is_empty());
        let strip =
            |f: &FilterOutput| FilterOutput { a_filt: vec![], p_filt: vec![], skip_filtered: false, ..f.clone() };
        // (Compared as text: the missing readings' NaN innovations are
        // not equal to themselves.)
        let same = |a: &dyn std::fmt::Debug, b: &dyn std::fmt::Debug| format!("{a:?}") == format!("{b:?}");
        assert!(same(&strip(&lean), &strip(&full)), "{text}: the filter runs differ");
        let (sl, sf) = (smooth(&model, &obs, &lean), smooth(&model, &obs, &full));
        assert!(same(&sl, &sf), "{text}: the smoothers differ");
    }
}

#[test]
fn a_run_without_the_loglik_stores_the_same_arrays() {
    // `loglik: false` leaves the log-likelihood and its sum of log F NaN
    // and changes nothing else, bit for bit, on every path, with irregular
    // steps and weights as the cleaning steps give them.
    for (text, model, y) in one_each_path_with_gaps(4) {
        let dt: Vec<f64> = (0..800).map(|t| if t == 300 { 3.0 } else { 1.0 }).collect();
        let w: Vec<f64> = (0..800).map(|t| if t % 97 == 0 { 4.0 } else { 1.0 }).collect();
        let obs = Observations { y: &y, p: 1, dt: Some(&dt), h_scale: Some(&w) };
        let with = filter(&model, &obs, &FilterOptions::default()).unwrap();
        let without = filter(&model, &obs, &FilterOptions { loglik: false, ..Default::default() }).unwrap();
        assert!(with.loglik.is_finite() && with.sum_log_f.is_finite(), "{text}");
        assert!(without.loglik.is_nan() && without.sum_log_f.is_nan(), "{text}");
        let strip = |f: &FilterOutput| FilterOutput { loglik: 0.0, sum_log_f: 0.0, ..f.clone() };
        // (Compared as text: NaN innovations are not equal to themselves.)
        assert_eq!(format!("{:?}", strip(&with)), format!("{:?}", strip(&without)), "{text}");
        let (s1, s2) = (smooth(&model, &obs, &with), smooth(&model, &obs, &without));
        assert_eq!(format!("{s1:?}"), format!("{s2:?}"), "{text}: the smoothers differ");
    }
}
