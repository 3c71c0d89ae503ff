//! The online pass: a Kalman filter that tests each reading before it uses
//! it. A reading whose standardised innovation e_t = v_t / sqrt(F_t)
//! exceeds the spike bound is rejected and does not update the filter. There
//! is no gate lock-out: when `shift_run` consecutive readings are rejected
//! on the same side, the run is re-examined as a possible level shift: the
//! filter goes back to the first of them, adds the squared innovation there
//! to the level's variance (an intervention, Harvey 1989 §7.6; de Jong &
//! Penzer 1998) and carries on, so the new level is learnt instead of every
//! later reading being rejected.
//!
//! A gate that rejects nothing is the plain filter: `detect::find` first
//! takes the plain filter's innovations ([`tagwright::tagmodel::Fitted::innovations`],
//! exact diffuse start) and runs this pass only when some reading would be
//! rejected, which on most tags none is.
//!
//! Fixed-size nalgebra matrices for up to 6 states, plain numbers for two
//! states (the common case); the steady state (gain unchanged from one
//! reading to the next) is detected and then only the mean is propagated,
//! as in the batch filter.

use nalgebra::{SMatrix, SVector};
use tagwright::ssm::filter::congruence2;
use tagwright::ssm::model::StepSystem;
use tagwright::ssm::StateSpace;
use tagwright::tagmodel::TagObs;

/// Largest state dimension the online pass supports.
pub const MAX_STATES: usize = 6;

/// What the online pass found.
#[derive(Debug, Clone, Default)]
pub struct GateOutput {
    /// Standardised innovation per grid point (NaN where not observed or
    /// inside the diffuse start).
    pub e: Vec<f64>,
    /// Innovation per grid point.
    pub v: Vec<f64>,
    /// Rejected as a spike by the gate.
    pub gated: Vec<bool>,
    /// Level shifts found by re-examining a run: (grid point, innovation, e).
    pub shifts: Vec<(usize, f64, f64)>,
    /// Innovation variance in the steady state (or the median F), for the
    /// stuck test.
    pub f_typical: f64,
}

/// Options of the pass.
#[derive(Debug, Clone, Copy)]
pub struct GateOptions {
    /// Spike bound on |e|.
    pub spike: f64,
    /// Consecutive same-side rejections re-examined as a level shift.
    pub shift_run: usize,
    /// Index of the level state (for interventions), if the model has one.
    pub level: Option<usize>,
    /// Points that are never gated (pseudo-observations).
    pub min_warm: usize,
}

impl GateOutput {
    /// The pass's output taken from the plain filter's standardised
    /// innovations `e` and innovations `v` (NaN until warm, as the pass
    /// has them), when the pass would reject none of the readings: a gate
    /// that rejects nothing is that filter. `None` when some reading would
    /// be rejected (then the pass itself must run).
    pub fn from_plain(e: Vec<f64>, v: Vec<f64>, opts: &GateOptions, can_gate: &dyn Fn(usize) -> bool) -> Option<Self> {
        let rejects = (0..e.len()).any(|k| e[k].abs() > opts.spike && can_gate(k));
        (!rejects).then(|| {
            let n = e.len();
            GateOutput { e, v, gated: vec![false; n], shifts: Vec::new(), f_typical: f64::NAN }
        })
    }
}

/// Runs the online pass on `obs` with `model`; `can_gate(k)` says whether
/// grid point k may be rejected (pseudo-observations may not).
pub fn run(model: &StateSpace, obs: &TagObs, opts: &GateOptions, can_gate: &dyn Fn(usize) -> bool) -> GateOutput {
    match model.state_dim() {
        1 => pass::<1, SMatrix<f64, 1, 1>>(model, obs, opts, can_gate),
        2 => pass::<2, Sym2>(model, obs, opts, can_gate),
        3 => pass::<3, SMatrix<f64, 3, 3>>(model, obs, opts, can_gate),
        4 => pass::<4, SMatrix<f64, 4, 4>>(model, obs, opts, can_gate),
        5 => pass::<5, SMatrix<f64, 5, 5>>(model, obs, opts, can_gate),
        _ => pass::<6, SMatrix<f64, 6, 6>>(model, obs, opts, can_gate),
    }
}

fn mat<const M: usize>(d: &nalgebra::DMatrix<f64>) -> SMatrix<f64, M, M> {
    SMatrix::<f64, M, M>::from_fn(|i, j| d[(i, j)])
}

/// The covariance arithmetic of the pass, for M states: a full fixed-size
/// matrix ([`SMatrix`]), or for two states the three distinct entries of
/// the symmetric matrix ([`Sym2`], a third of the operations; level plus
/// AR(1), the default model of most tags, has two states, and the pass runs
/// over every reading of the window). The decisions are the same
/// (`the_two_state_pass_agrees_with_the_matrix_pass`).
trait Cov<const M: usize>: Copy {
    /// The transition matrix as this arithmetic holds it.
    type T: Copy;
    /// P1 = P1* + kappa P1_inf.
    fn initial(model: &StateSpace, kappa: f64) -> Self;
    /// T and RQR' of a step system.
    fn system(sys: &StepSystem) -> (Self::T, Self);
    /// T a + c.
    fn predict_mean(t: &Self::T, a: &SVector<f64, M>, c: &SVector<f64, M>) -> SVector<f64, M>;
    /// T P T' + Q.
    fn predict(&self, t: &Self::T, q: &Self) -> Self;
    /// The filtered covariance of a steady state given its predicted one:
    /// P - P z z' P / (z' P z + h).
    fn filtered(&self, z: &SVector<f64, M>, h: f64) -> Self;
    /// P z.
    fn times(&self, z: &SVector<f64, M>) -> SVector<f64, M>;
    /// P - g g' f (the update with gain g and innovation variance f).
    fn update(&mut self, g: &SVector<f64, M>, f: f64);
    /// Adds x to the variance of state i.
    fn widen(&mut self, i: usize, x: f64);
    /// Largest absolute entry.
    fn amax(&self) -> f64;
    /// Largest absolute entry of self - other.
    fn change(&self, other: &Self) -> f64;
}

impl<const M: usize> Cov<M> for SMatrix<f64, M, M> {
    type T = SMatrix<f64, M, M>;

    fn initial(model: &StateSpace, kappa: f64) -> Self {
        mat::<M>(&model.p1_star) + mat::<M>(&model.p1_inf) * kappa
    }

    fn system(sys: &StepSystem) -> (Self::T, Self) {
        (mat(&sys.t), mat(&sys.rqr))
    }

    fn predict_mean(t: &Self::T, a: &SVector<f64, M>, c: &SVector<f64, M>) -> SVector<f64, M> {
        t * a + c
    }

    fn predict(&self, t: &Self::T, q: &Self) -> Self {
        t * self * t.transpose() + q
    }

    fn filtered(&self, z: &SVector<f64, M>, h: f64) -> Self {
        let pz = self * z;
        let f = z.dot(&pz) + h;
        self - pz * pz.transpose() / f
    }

    fn times(&self, z: &SVector<f64, M>) -> SVector<f64, M> {
        self * z
    }

    fn update(&mut self, g: &SVector<f64, M>, f: f64) {
        *self -= g * g.transpose() * f;
        *self = (*self + self.transpose()) * 0.5;
    }

    fn widen(&mut self, i: usize, x: f64) {
        self[(i, i)] += x;
    }

    fn amax(&self) -> f64 {
        SMatrix::amax(self)
    }

    fn change(&self, other: &Self) -> f64 {
        (self - other).amax()
    }
}

/// Predicted (or filtered) covariance of a two-state model: the three
/// distinct entries of the symmetric matrix.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Sym2 {
    p00: f64,
    p01: f64,
    p11: f64,
}

impl Cov<2> for Sym2 {
    /// T row by row.
    type T = [f64; 4];

    fn initial(model: &StateSpace, kappa: f64) -> Self {
        let (ps, pi) = (&model.p1_star, &model.p1_inf);
        Sym2 {
            p00: ps[(0, 0)] + pi[(0, 0)] * kappa,
            p01: 0.5 * (ps[(0, 1)] + ps[(1, 0)]) + 0.5 * (pi[(0, 1)] + pi[(1, 0)]) * kappa,
            p11: ps[(1, 1)] + pi[(1, 1)] * kappa,
        }
    }

    fn system(sys: &StepSystem) -> (Self::T, Self) {
        let (t, q) = (&sys.t, &sys.rqr);
        (
            [t[(0, 0)], t[(0, 1)], t[(1, 0)], t[(1, 1)]],
            Sym2 { p00: q[(0, 0)], p01: 0.5 * (q[(0, 1)] + q[(1, 0)]), p11: q[(1, 1)] },
        )
    }

    fn predict_mean(t: &Self::T, a: &SVector<f64, 2>, c: &SVector<f64, 2>) -> SVector<f64, 2> {
        SVector::<f64, 2>::new(t[0] * a[0] + t[1] * a[1] + c[0], t[2] * a[0] + t[3] * a[1] + c[1])
    }

    fn predict(&self, t: &Self::T, q: &Self) -> Self {
        let [s00, s01, s11] = congruence2(*t, [self.p00, self.p01, self.p11]);
        Sym2 { p00: s00 + q.p00, p01: s01 + q.p01, p11: s11 + q.p11 }
    }

    fn filtered(&self, z: &SVector<f64, 2>, h: f64) -> Self {
        let pz = self.times(z);
        let f = z[0] * pz[0] + z[1] * pz[1] + h;
        Sym2 { p00: self.p00 - pz[0] * pz[0] / f, p01: self.p01 - pz[0] * pz[1] / f, p11: self.p11 - pz[1] * pz[1] / f }
    }

    fn times(&self, z: &SVector<f64, 2>) -> SVector<f64, 2> {
        SVector::<f64, 2>::new(self.p00 * z[0] + self.p01 * z[1], self.p01 * z[0] + self.p11 * z[1])
    }

    fn update(&mut self, g: &SVector<f64, 2>, f: f64) {
        self.p00 -= g[0] * g[0] * f;
        self.p01 -= g[0] * g[1] * f;
        self.p11 -= g[1] * g[1] * f;
    }

    fn widen(&mut self, i: usize, x: f64) {
        if i == 0 {
            self.p00 += x;
        } else {
            self.p11 += x;
        }
    }

    fn amax(&self) -> f64 {
        self.p00.abs().max(self.p01.abs()).max(self.p11.abs())
    }

    fn change(&self, other: &Self) -> f64 {
        Sym2 { p00: self.p00 - other.p00, p01: self.p01 - other.p01, p11: self.p11 - other.p11 }.amax()
    }
}

/// The pass for M states with covariance arithmetic `P`.
fn pass<const M: usize, P: Cov<M>>(
    model: &StateSpace,
    obs: &TagObs,
    opts: &GateOptions,
    can_gate: &dyn Fn(usize) -> bool,
) -> GateOutput {
    let n = obs.len();
    let mut out =
        GateOutput { e: vec![f64::NAN; n], v: vec![f64::NAN; n], gated: vec![false; n], ..Default::default() };
    if model.state_dim() != M || n == 0 {
        return out;
    }
    let mut sys = model.step_system();
    let (t1, q1) = P::system(&sys);
    let c: SVector<f64, M> = SVector::from_fn(|i, _| model.c[i]);
    let z: SVector<f64, M> = SVector::from_fn(|i, _| model.z[(0, i)]);
    let d = model.d[0];
    let h = model.h[0];
    // Diffuse states start with a variance far above anything in the data.
    let spread = {
        let ys: Vec<f64> = obs.y.iter().copied().filter(|v| v.is_finite()).take(1000).collect();
        let mean = ys.iter().sum::<f64>() / ys.len().max(1) as f64;
        ys.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / ys.len().max(1) as f64
    };
    let kappa = 1e6 * (spread + h + 1.0);
    let mut a: SVector<f64, M> = SVector::from_fn(|i, _| model.a1[i]);
    let mut p = P::initial(model, kappa);
    let n_diffuse = model.n_diffuse();

    let mut updates = 0usize;
    let mut run: Vec<(usize, f64)> = Vec::new();
    let mut snapshot: Option<(usize, SVector<f64, M>, P)> = None;
    let mut force_accept: Option<usize> = None;
    let mut f_seen: Vec<f64> = Vec::new();
    // Steady state: (gain, F, predicted P).
    let mut steady: Option<(SVector<f64, M>, f64, P)> = None;
    let mut prev_p: Option<P> = None;

    let mut k = 0;
    let mut predicted_for = usize::MAX;
    while k < n {
        // Prediction from k-1 to k (a and p hold the filtered values at k-1).
        if k > 0 && predicted_for != k {
            let dt = obs.dt[k - 1];
            if dt == 1.0 {
                a = P::predict_mean(&t1, &a, &c);
                if steady.is_none() {
                    p = p.predict(&t1, &q1);
                }
            } else {
                if let Some((_, _, pp)) = steady.take() {
                    // p held the steady predicted covariance; go back to the filtered one.
                    p = pp.filtered(&z, h);
                }
                model.system_for_step(dt, &mut sys);
                let (tk, qk) = P::system(&sys);
                a = P::predict_mean(&tk, &a, &c);
                p = p.predict(&tk, &qk);
            }
        }
        predicted_for = k;
        let y = obs.y[k];
        let w = obs.w[k];
        if !y.is_finite() {
            if let Some((_, _, pp)) = steady.take() {
                p = pp;
            }
            prev_p = None;
            k += 1;
            continue;
        }
        if w != 1.0 {
            if let Some((_, _, pp)) = steady.take() {
                p = pp;
            }
        }
        let (f, gain) = match &steady {
            Some((g, f, _)) => (*f, *g),
            None => {
                let pz = p.times(&z);
                let f = z.dot(&pz) + h * w;
                (f, pz / f)
            }
        };
        let v = y - z.dot(&a) - d;
        let e = v / f.sqrt();
        let warm = updates >= n_diffuse + opts.min_warm;
        if warm {
            out.e[k] = e;
            out.v[k] = v;
            if f_seen.len() < 4096 {
                f_seen.push(f);
            }
        }
        let reject = warm && e.abs() > opts.spike && can_gate(k) && force_accept != Some(k);
        if reject {
            out.gated[k] = true;
            let sign = e.signum();
            let pp = match &steady {
                Some((_, _, pp)) => *pp,
                None => p,
            };
            if run.is_empty() {
                snapshot = Some((k, a, pp));
            }
            if run.iter().all(|&(_, s)| s == sign) {
                run.push((k, sign));
            } else {
                run.clear();
                run.push((k, sign));
                snapshot = Some((k, a, pp));
            }
            if run.len() >= opts.shift_run.max(1) {
                if let (Some(level), Some((k0, a0, p0))) = (opts.level, snapshot.take()) {
                    // Re-examine: a level shift at k0. Undo the rejections and
                    // restart from k0 with the level's variance widened.
                    for &(j, _) in &run {
                        out.gated[j] = false;
                    }
                    let v0 = out.v[k0];
                    out.shifts.push((k0, v0, out.e[k0]));
                    a = a0;
                    p = p0;
                    p.widen(level, v0 * v0);
                    steady = None;
                    prev_p = None;
                    run.clear();
                    force_accept = Some(k0);
                    predicted_for = k0;
                    k = k0;
                    continue;
                }
            }
            // A rejected reading is not used: the prediction carries on.
            if let Some((_, _, pp)) = steady.take() {
                p = pp;
            }
            prev_p = None;
            k += 1;
            continue;
        }
        run.clear();
        snapshot = None;
        // Update.
        match steady {
            Some((g, _, _)) => a += g * v,
            None => {
                let p_pred = p;
                a += gain * v;
                p.update(&gain, f);
                updates += 1;
                if dt_regular(obs, k) && w == 1.0 {
                    if let Some(prev) = prev_p {
                        let scale = p_pred.amax().max(1e-300);
                        if p_pred.change(&prev) <= 1e-10 * scale {
                            steady = Some((gain, f, p_pred));
                        }
                    }
                    prev_p = Some(p_pred);
                } else {
                    prev_p = None;
                }
            }
        }
        k += 1;
    }
    out.f_typical = match steady {
        Some((_, f, _)) => f,
        None => {
            if f_seen.is_empty() {
                f64::NAN
            } else {
                let mid = f_seen.len() / 2;
                f_seen.select_nth_unstable_by(mid, f64::total_cmp);
                f_seen[mid]
            }
        }
    };
    out
}

/// True when the step into k and out of k are one period.
fn dt_regular(obs: &TagObs, k: usize) -> bool {
    obs.dt[k] == 1.0 && (k == 0 || obs.dt[k - 1] == 1.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use tagwright::rng::Rng;
    use tagwright::series::{Quality, ReadCounts, Sampling, TagSeries, TagTable};
    use tagwright::ssm::ModelSpec;

    fn obs(values: Vec<f64>) -> TagObs {
        let n = values.len();
        let s = TagSeries {
            tag: "FT-1".into(),
            ts_us: (0..n as i64).collect(),
            values,
            quality: vec![Quality::Good; n],
            counts: ReadCounts::default(),
        };
        let t = TagTable::from_series(&s, 1, Sampling::Regular);
        TagObs::build(&t, 4.0, |_| true, 0)
    }

    fn local_level(h: f64, q: f64) -> StateSpace {
        "local-level".parse::<ModelSpec>().unwrap().build(&[h, q]).unwrap()
    }

    #[test]
    fn a_spike_is_gated_and_the_filter_is_not_pulled() {
        let mut rng = Rng::new(1);
        let mut y: Vec<f64> = (0..500).map(|_| 10.0 + 0.1 * rng.normal()).collect();
        y[300] += 5.0;
        let o = obs(y);
        let g = run(
            &local_level(0.01, 1e-5),
            &o,
            &GateOptions { spike: 5.0, shift_run: 3, level: Some(0), min_warm: 2 },
            &|_| true,
        );
        assert!(g.gated[300]);
        assert_eq!(g.gated.iter().filter(|&&x| x).count(), 1);
        // The reading after the spike is judged against the unpulled level.
        assert!(g.e[301].abs() < 4.0);
        assert!(g.shifts.is_empty());
    }

    #[test]
    fn a_run_of_rejections_becomes_a_level_shift() {
        let mut rng = Rng::new(2);
        let y: Vec<f64> = (0..600).map(|t| if t < 400 { 10.0 } else { 12.0 } + 0.1 * rng.normal()).collect();
        let o = obs(y);
        let g = run(
            &local_level(0.01, 1e-5),
            &o,
            &GateOptions { spike: 5.0, shift_run: 3, level: Some(0), min_warm: 2 },
            &|_| true,
        );
        assert_eq!(g.shifts.len(), 1, "{:?}", g.shifts);
        assert_eq!(g.shifts[0].0, 400);
        assert!(g.shifts[0].1 > 1.5);
        // No reading after the shift stays rejected.
        assert_eq!(g.gated.iter().filter(|&&x| x).count(), 0);
        assert!(g.e[450].abs() < 4.0);
    }

    #[test]
    fn steady_state_gives_the_same_innovations_as_the_batch_filter() {
        let mut rng = Rng::new(3);
        let mut level = 0.0;
        let mut y: Vec<f64> = (0..3000)
            .map(|_| {
                level += 0.05 * rng.normal();
                level + 0.2 * rng.normal()
            })
            .collect();
        y[1000] = f64::NAN;
        let o = obs(y);
        let spec: ModelSpec = "local-level+arma(1,0)".parse().unwrap();
        let model = spec.build(&[0.04, 0.0025, 0.7, 0.01]).unwrap();
        let g = run(&model, &o, &GateOptions { spike: 50.0, shift_run: 3, level: Some(0), min_warm: 2 }, &|_| true);
        let f = tagwright::ssm::filter(&model, &o.observations(), &Default::default()).unwrap();
        for t in [50, 999, 1001, 2500, 2999] {
            let e = f.standardised(t, 0);
            assert!((g.e[t] - e).abs() < 1e-4, "t={t}: online {} batch {e}", g.e[t]);
        }
    }

    /// The two-state pass on plain numbers makes the decisions of the
    /// matrix pass and gives the same innovations to rounding: spikes, a
    /// level shift, missing readings, uncertain weights, a long step, and
    /// both a steady stretch and a restart from it.
    #[test]
    fn the_two_state_pass_agrees_with_the_matrix_pass() {
        let mut rng = Rng::new(4);
        let mut x = 0.0;
        let y: Vec<f64> = (0..4000)
            .map(|t| {
                x = 0.9 * x + 0.05 * rng.normal();
                let shift = if t >= 2500 { 3.0 } else { 0.0 };
                let spike = if t % 701 == 300 { 4.0 } else { 0.0 };
                if t % 257 == 9 {
                    f64::NAN
                } else {
                    20.0 + x + shift + spike + 0.1 * rng.normal()
                }
            })
            .collect();
        let mut o = obs(y);
        for k in (0..o.len()).step_by(97) {
            o.w[k] = 4.0;
        }
        o.dt[1800] = 40.0;
        let spec: ModelSpec = "local-level+arma(1,0)".parse().unwrap();
        let model = spec.build(&[0.01, 1e-6, 0.9, 0.0025]).unwrap();
        let opts = GateOptions { spike: 5.0, shift_run: 3, level: Some(0), min_warm: 2 };
        let plain = pass::<2, Sym2>(&model, &o, &opts, &|_| true);
        let matrix = pass::<2, SMatrix<f64, 2, 2>>(&model, &o, &opts, &|_| true);
        assert_eq!(plain.gated, matrix.gated);
        assert_eq!(plain.shifts.len(), matrix.shifts.len());
        assert!(plain.shifts.iter().any(|s| s.0 == 2500), "{:?}", plain.shifts);
        assert!(plain.gated.iter().filter(|&&g| g).count() >= 3);
        for (a, b) in plain.e.iter().zip(&matrix.e) {
            assert!(a.is_nan() == b.is_nan() && (a.is_nan() || (a - b).abs() <= 1e-8 * (1.0 + b.abs())), "{a} vs {b}");
        }
        assert!((plain.f_typical - matrix.f_typical).abs() <= 1e-9 * matrix.f_typical);
    }
}
