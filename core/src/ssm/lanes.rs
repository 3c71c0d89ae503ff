//! Log-likelihoods of several two-state models on one series, in lock-step.
//!
//! One filter step of a small model is a chain of dependent operations (a
//! division among them), so a single filter runs at the speed of that chain
//! and leaves most of the processor idle. The optimiser asks for the
//! likelihood at several points at once (the stencil of a Newton step, the
//! grid of starting values); their filters are independent, so running them
//! side by side, one time step for all at a time, overlaps the chains and
//! lets the compiler use vector instructions across them.
//!
//! Each model runs the ordinary filter (`filter::run_until`) through its
//! diffuse phase, then the lock-step loop takes over with the update and
//! prediction of the general filter (update P - K K'/F, then T P T' + Q),
//! which differ from the two-state loop of `filter` at rounding level: that
//! loop folds the update into the prediction and carries the next F on its
//! own (see its documentation); here the products of an update are
//! grouped as K (v / F); log F is taken from a running
//! product whose binary exponent is moved out every 8 steps; and the
//! steady-state shortcut starts only when every lane of the pass has
//! converged, so a lane's result can depend in its last bits on the other
//! lanes of its pass (the passes are fixed by the data and the optimiser,
//! so a fit stays reproducible bit for bit). `tests::matches_the_filter`
//! checks the results against the filter.

use super::filter::{
    clear_negative, concentrated_loglik_of, congruence2, two_state_handoff, two_state_system, FilterOptions,
    FilterOutput, Handoff,
};
use super::model::{Observations, StateSpace};

/// Most models per lock-step pass (fewer run in a narrower pass).
pub(crate) const LANES: usize = 16;

/// Concentrated log-likelihood (as [`FilterOutput::concentrated_loglik`],
/// with `nobs` counted observations; NaN for a model whose likelihood has no
/// counted observation) of each model in `models` on `obs`. Every model
/// must have two states and one observation element; `obs` must be valid.
pub(crate) fn concentrated_logliks(
    models: &[StateSpace],
    obs: &Observations,
    buf: &mut FilterOutput,
    out: &mut Vec<(f64, usize)>,
) {
    out.clear();
    for chunk in models.chunks(LANES) {
        let start = out.len();
        let mut handoffs: Vec<Option<(Handoff, Sums)>> = Vec::with_capacity(chunk.len());
        for model in chunk {
            let h = two_state_handoff(model, obs, buf);
            let sums = Sums::of(buf);
            match h {
                Some(h) => handoffs.push(Some((h, sums))),
                None => {
                    // The run ended in the filter: its sums are complete.
                    handoffs.push(None);
                    out.push((sums.concentrated(0.0, 0.0, 0), sums.nobs));
                    continue;
                }
            }
            out.push((f64::NAN, 0));
        }
        // Lanes that reach the ordinary recursion at the first lane's time
        // go on together; any other (not seen in practice: the diffuse
        // phase depends on the data and the model's structure only) goes alone.
        let t0 = handoffs.iter().flatten().map(|(h, _)| h.t).next();
        let mut lanes: Vec<usize> = Vec::new();
        for (i, h) in handoffs.iter().enumerate() {
            if let Some((h, _)) = h {
                if Some(h.t) == t0 {
                    lanes.push(i);
                }
            }
        }
        let alone: Vec<usize> = (0..chunk.len()).filter(|i| handoffs[*i].is_some() && !lanes.contains(i)).collect();
        for group in std::iter::once(lanes).chain(alone.into_iter().map(|i| vec![i])) {
            if group.is_empty() {
                continue;
            }
            let mut taken: Vec<(Handoff, Sums, &StateSpace)> = Vec::with_capacity(group.len());
            for &i in &group {
                if let Some((h, s)) = handoffs[i].take() {
                    taken.push((h, s, &chunk[i]));
                }
            }
            let results = match taken.len() {
                1 => dispatch::<1>(&mut taken, obs),
                2 => dispatch::<2>(&mut taken, obs),
                3 | 4 => dispatch::<4>(&mut taken, obs),
                5..=8 => dispatch::<8>(&mut taken, obs),
                _ => dispatch::<LANES>(&mut taken, obs),
            };
            for (&i, r) in group.iter().zip(results) {
                out[start + i] = r;
            }
        }
    }
}

/// The filter's sums at the handoff.
#[derive(Debug, Clone, Copy)]
struct Sums {
    nobs: usize,
    n_diffuse_obs: usize,
    sum_v2_f: f64,
    sum_log_f: f64,
    sum_log_f_inf: f64,
}

impl Sums {
    fn of(o: &FilterOutput) -> Self {
        Sums {
            nobs: o.nobs,
            n_diffuse_obs: o.n_diffuse_obs,
            sum_v2_f: o.sum_v2_f,
            sum_log_f: o.sum_log_f,
            sum_log_f_inf: o.sum_log_f_inf,
        }
    }

    /// The concentrated log-likelihood with further sums added.
    fn concentrated(&self, v2_f: f64, log_f: f64, nobs: usize) -> f64 {
        concentrated_loglik_of(
            self.nobs + nobs,
            self.n_diffuse_obs,
            self.sum_v2_f + v2_f,
            self.sum_log_f + log_f,
            self.sum_log_f_inf,
        )
    }
}

/// [`lockstep`] compiled for AVX2 where the processor has it (twice the
/// lanes per instruction of the baseline x86-64 build). The results are the
/// same bit for bit: the same IEEE operations in the same order (Rust does
/// not fuse multiply-adds on its own).
fn dispatch<const L: usize>(taken: &mut [(Handoff, Sums, &StateSpace)], obs: &Observations) -> Vec<(f64, usize)> {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the processor supports AVX2 (checked just above).
        return unsafe { lockstep_avx2::<L>(taken, obs) };
    }
    lockstep::<L>(taken, obs)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn lockstep_avx2<const L: usize>(taken: &mut [(Handoff, Sums, &StateSpace)], obs: &Observations) -> Vec<(f64, usize)> {
    lockstep::<L>(taken, obs)
}

/// The lock-step loop over up to [`LANES`] models from their common handoff
/// time; returns (concentrated log-likelihood, counted observations) per model.
#[inline(always)]
fn lockstep<const L: usize>(taken: &mut [(Handoff, Sums, &StateSpace)], obs: &Observations) -> Vec<(f64, usize)> {
    let k = taken.len();
    debug_assert!(k >= 1 && k <= L);
    // Idle lanes repeat lane 0 (their results are dropped).
    let lane = |l: usize| if l < k { l } else { 0 };
    let mut st = State::<L>::new();
    for l in 0..L {
        let (h, _, m) = &taken[lane(l)];
        st.a0[l] = h.a[0];
        st.a1[l] = h.a[1];
        [st.p00[l], st.p01[l], st.p11[l]] = h.p;
        st.z0[l] = m.z[(0, 0)];
        st.z1[l] = m.z[(0, 1)];
        st.d0[l] = m.d[0];
        st.h0[l] = m.h[0];
        st.c0[l] = m.c[0];
        st.c1[l] = m.c[1];
        st.set_system(l, &two_state_system(&h.sys));
    }
    let mut cur_dt = taken[0].0.cur_dt;
    let mut sum = st.is_sum();
    let n = obs.len();
    let mut t = taken[0].0.t;
    while t < n {
        let y = obs.y[t];
        let w = obs.weight(t, 0);
        if !y.is_nan() {
            if sum {
                st.update::<true>(y, w);
            } else {
                st.update::<false>(y, w);
            }
        }
        let dt = obs.step(t);
        if dt != cur_dt {
            for (l, (h, _, m)) in taken.iter_mut().enumerate() {
                m.system_for_step(dt, &mut h.sys);
                st.set_system(l, &two_state_system(&h.sys));
            }
            for l in k..L {
                st.copy_system(l, 0);
            }
            cur_dt = dt;
            sum = st.is_sum();
        }
        // The filter's steady-state test, in every lane at once, on every
        // 8th step (the test costs as much as a tenth of a step).
        let check = t.is_multiple_of(8) && !y.is_nan() && w == 1.0 && dt == 1.0;
        let before = if check { Some((st.p00, st.p01, st.p11)) } else { None };
        if sum {
            st.predict::<true>();
        } else {
            st.predict::<false>();
        }
        t += 1;
        if before.is_some_and(|b| st.converged(&b)) {
            t = st.run_steady(obs, t);
        }
    }
    (0..k)
        .map(|l| {
            let (h, sums, _) = &taken[l];
            let log_f = h.logs.total() + st.log_sum[l] + st.log2_sum[l] * std::f64::consts::LN_2 + st.prod[l].ln();
            let nobs = st.nobs[l] + st.plain_updates;
            (sums.concentrated(st.v2_f[l], log_f, nobs), sums.nobs + nobs)
        })
        .collect()
}

/// The lanes' filter states, one array entry per lane.
struct State<const L: usize> {
    a0: [f64; L],
    a1: [f64; L],
    p00: [f64; L],
    p01: [f64; L],
    p11: [f64; L],
    z0: [f64; L],
    z1: [f64; L],
    d0: [f64; L],
    h0: [f64; L],
    c0: [f64; L],
    c1: [f64; L],
    t00: [f64; L],
    t10: [f64; L],
    t01: [f64; L],
    t11: [f64; L],
    q00: [f64; L],
    q01: [f64; L],
    q11: [f64; L],
    v2_f: [f64; L],
    /// log F of the regular updates is log_sum + log2_sum ln 2 + ln(prod):
    /// `prod` multiplies the factors (in 1e-35..1e35), `log2_sum` collects
    /// its binary exponent every 8 steps, `log_sum` takes the rest.
    prod: [f64; L],
    log2_sum: [f64; L],
    log_sum: [f64; L],
    /// Factors in `prod` (the same in every lane).
    pending: u32,
    /// Counted observations: updates in every lane at once, plus each lane's own.
    plain_updates: usize,
    nobs: [usize; L],
}

impl<const L: usize> State<L> {
    fn new() -> Self {
        State {
            a0: [0.0; L],
            a1: [0.0; L],
            p00: [0.0; L],
            p01: [0.0; L],
            p11: [0.0; L],
            z0: [0.0; L],
            z1: [0.0; L],
            d0: [0.0; L],
            h0: [0.0; L],
            c0: [0.0; L],
            c1: [0.0; L],
            t00: [0.0; L],
            t10: [0.0; L],
            t01: [0.0; L],
            t11: [0.0; L],
            q00: [0.0; L],
            q01: [0.0; L],
            q11: [0.0; L],
            v2_f: [0.0; L],
            prod: [1.0; L],
            log2_sum: [0.0; L],
            log_sum: [0.0; L],
            pending: 0,
            plain_updates: 0,
            nobs: [0; L],
        }
    }
}

/// F factors outside this range have their log taken alone, so the product
/// of a mantissa and 8 pending factors stays inside 1e-280..1e281.
const PROD_RANGE: std::ops::RangeInclusive<f64> = 1e-35..=1e35;

impl<const L: usize> State<L> {
    fn set_system(&mut self, l: usize, s: &[f64; 7]) {
        [self.t00[l], self.t10[l], self.t01[l], self.t11[l], self.q00[l], self.q01[l], self.q11[l]] = *s;
    }

    fn copy_system(&mut self, l: usize, from: usize) {
        for arr in
            [&mut self.t00, &mut self.t10, &mut self.t01, &mut self.t11, &mut self.q00, &mut self.q01, &mut self.q11]
        {
            arr[l] = arr[from];
        }
    }

    /// True when every lane is a sum of two one-state blocks: z = [1, 1],
    /// d = 0, c = 0 and a diagonal T (level plus AR(1), the default model of
    /// most tags). [`State::update`] and [`State::predict`] then run a copy
    /// with those entries known: the same arithmetic (x * 1 = x, and the
    /// products with zeros drop out), in about half the operations.
    fn is_sum(&self) -> bool {
        (0..L).all(|l| {
            self.z0[l] == 1.0
                && self.z1[l] == 1.0
                && self.d0[l] == 0.0
                && self.c0[l] == 0.0
                && self.c1[l] == 0.0
                && self.t01[l] == 0.0
                && self.t10[l] == 0.0
        })
    }

    /// The update with observation y (weight w on H) in every lane.
    #[inline(always)]
    fn update<const SUM: bool>(&mut self, y: f64, w: f64) {
        let mut k0 = [0.0; L];
        let mut k1 = [0.0; L];
        let mut v = [0.0; L];
        let mut f = [0.0; L];
        let mut plain = true;
        for l in 0..L {
            let h = self.h0[l] * w;
            if SUM {
                k0[l] = self.p00[l] + self.p01[l];
                k1[l] = self.p01[l] + self.p11[l];
                v[l] = y - (self.a0[l] + self.a1[l]);
                f[l] = k0[l] + k1[l] + h;
            } else {
                k0[l] = self.p00[l] * self.z0[l] + self.p01[l] * self.z1[l];
                k1[l] = self.p01[l] * self.z0[l] + self.p11[l] * self.z1[l];
                v[l] = y - (self.z0[l] * self.a0[l] + self.z1[l] * self.a1[l]) - self.d0[l];
                f[l] = self.z0[l] * k0[l] + self.z1[l] * k1[l] + h;
            }
            // The filter's degenerate test (F = 0 up to rounding), and the
            // range the product of logs can hold.
            let floor = 1e-13 * (h + 0f64.max(self.p00[l]).max(self.p11[l])).max(f64::MIN_POSITIVE);
            plain &= f[l] > floor.max(*PROD_RANGE.start()) && f[l] <= *PROD_RANGE.end();
        }
        if plain {
            for l in 0..L {
                self.take(l, k0[l], k1[l], v[l], f[l]);
                self.prod[l] *= f[l];
            }
            self.plain_updates += 1;
        } else {
            for l in 0..L {
                let floor = 1e-13 * (self.h0[l] * w + 0f64.max(self.p00[l]).max(self.p11[l])).max(f64::MIN_POSITIVE);
                if f[l].is_nan() || f[l] <= floor {
                    continue; // degenerate: no new information
                }
                self.take(l, k0[l], k1[l], v[l], f[l]);
                if PROD_RANGE.contains(&f[l]) {
                    self.prod[l] *= f[l];
                } else {
                    self.log_sum[l] += f[l].ln();
                }
                self.nobs[l] += 1;
            }
        }
        self.pending += 1;
        if self.pending == 8 {
            // Move the product's binary exponent into `log2_sum`, leaving
            // its mantissa (1 <= prod < 2): exact, and no logarithm per lane.
            for l in 0..L {
                let bits = self.prod[l].to_bits();
                self.log2_sum[l] += ((bits >> 52) as i64 - 1023) as f64;
                self.prod[l] = f64::from_bits((bits & ((1u64 << 52) - 1)) | (1023u64 << 52));
            }
            self.pending = 0;
        }
    }

    /// True when every lane's predicted covariance changed by no more than
    /// the filter's steady-state tolerance (relative to its largest entry).
    #[inline(always)]
    fn converged(&self, before: &([f64; L], [f64; L], [f64; L])) -> bool {
        let tol = FilterOptions::default().steady_tol;
        let mut all = true;
        for l in 0..L {
            let scale = self.p00[l].abs().max(self.p01[l].abs()).max(self.p11[l].abs()).max(f64::MIN_POSITIVE);
            let change = (before.0[l] - self.p00[l])
                .abs()
                .max((before.1[l] - self.p01[l]).abs())
                .max((before.2[l] - self.p11[l]).abs());
            all &= change <= tol * scale;
        }
        all
    }

    /// The steady state from `t` (DK 2012, §4.3.4): K, F and P frozen at
    /// the converged values, a <- M a + b y + e with M = T (I - g z'),
    /// b = T g, g = K / F, e = c - b d, while the steps stay plain
    /// (observed, unit weight, one period). Returns the first time index
    /// not taken; P still holds the predicted covariance there.
    #[inline(always)]
    fn run_steady(&mut self, obs: &Observations, t0: usize) -> usize {
        let (mut m00, mut m01, mut m10, mut m11) = ([0.0; L], [0.0; L], [0.0; L], [0.0; L]);
        let (mut b0, mut b1, mut e0, mut e1, mut f) = ([0.0; L], [0.0; L], [0.0; L], [0.0; L], [0.0; L]);
        for l in 0..L {
            let k0 = self.p00[l] * self.z0[l] + self.p01[l] * self.z1[l];
            let k1 = self.p01[l] * self.z0[l] + self.p11[l] * self.z1[l];
            f[l] = self.z0[l] * k0 + self.z1[l] * k1 + self.h0[l];
            let (g0, g1) = (k0 / f[l], k1 / f[l]);
            let (t00, t01, t10, t11) = (self.t00[l], self.t01[l], self.t10[l], self.t11[l]);
            // (I - g z')
            let (i00, i01, i10, i11) =
                (1.0 - g0 * self.z0[l], -g0 * self.z1[l], -g1 * self.z0[l], 1.0 - g1 * self.z1[l]);
            m00[l] = t00 * i00 + t01 * i10;
            m01[l] = t00 * i01 + t01 * i11;
            m10[l] = t10 * i00 + t11 * i10;
            m11[l] = t10 * i01 + t11 * i11;
            b0[l] = t00 * g0 + t01 * g1;
            b1[l] = t10 * g0 + t11 * g1;
            e0[l] = self.c0[l] - b0[l] * self.d0[l];
            e1[l] = self.c1[l] - b1[l] * self.d0[l];
        }
        let mut v2 = [0.0; L];
        let n = obs.len();
        let mut t = t0;
        while t < n {
            let y = obs.y[t];
            if y.is_nan() || obs.weight(t, 0) != 1.0 || obs.step(t) != 1.0 {
                break;
            }
            for l in 0..L {
                let (a0, a1) = (self.a0[l], self.a1[l]);
                let v = y - (self.z0[l] * a0 + self.z1[l] * a1) - self.d0[l];
                v2[l] += v * v;
                self.a0[l] = m00[l] * a0 + m01[l] * a1 + b0[l] * y + e0[l];
                self.a1[l] = m10[l] * a0 + m11[l] * a1 + b1[l] * y + e1[l];
            }
            t += 1;
        }
        let count = t - t0;
        if count > 0 {
            for l in 0..L {
                // No degenerate F here: a converged F equals the last update's.
                self.v2_f[l] += v2[l] / f[l];
                self.log_sum[l] += count as f64 * f[l].ln();
                self.nobs[l] += count;
            }
        }
        t
    }

    /// The regular update of lane l: a += K v / F, P -= K K' / F, and
    /// v^2 / F into the sum (the products grouped so that each is taken once).
    #[inline(always)]
    fn take(&mut self, l: usize, k0: f64, k1: f64, v: f64, f: f64) {
        let finv = 1.0 / f;
        let vf = v * finv;
        let (g0, g1) = (k0 * finv, k1 * finv);
        self.a0[l] += k0 * vf;
        self.a1[l] += k1 * vf;
        self.p00[l] -= g0 * k0;
        self.p01[l] -= g0 * k1;
        self.p11[l] -= g1 * k1;
        self.v2_f[l] += v * vf;
    }

    /// a <- T a + c, P <- T P T' + RQR' in every lane.
    #[inline(always)]
    fn predict<const SUM: bool>(&mut self) {
        if SUM {
            for l in 0..L {
                let (t00, t11) = (self.t00[l], self.t11[l]);
                self.a0[l] *= t00;
                self.a1[l] *= t11;
                let (s00, s01, s11) = ((t00 * self.p00[l]) * t00, (t00 * self.p01[l]) * t11, (t11 * self.p11[l]) * t11);
                self.p00[l] = clear_negative(s00 + self.q00[l]);
                self.p01[l] = s01 + self.q01[l];
                self.p11[l] = clear_negative(s11 + self.q11[l]);
            }
            return;
        }
        for l in 0..L {
            let (a0, a1) = (self.a0[l], self.a1[l]);
            self.a0[l] = self.t00[l] * a0 + self.t01[l] * a1 + self.c0[l];
            self.a1[l] = self.t10[l] * a0 + self.t11[l] * a1 + self.c1[l];
            let [s00, s01, s11] = congruence2(
                [self.t00[l], self.t01[l], self.t10[l], self.t11[l]],
                [self.p00[l], self.p01[l], self.p11[l]],
            );
            self.p00[l] = clear_negative(s00 + self.q00[l]);
            self.p01[l] = s01 + self.q01[l];
            self.p11[l] = clear_negative(s11 + self.q11[l]);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;
    use crate::ssm::filter::{filter, FilterOptions};
    use crate::ssm::spec::ModelSpec;

    /// Every lane's result matches the ordinary filter's concentrated
    /// log-likelihood, with missing values, weights, a long step between
    /// blocks, and more models than one pass holds.
    #[test]
    fn matches_the_filter() {
        let mut rng = Rng::new(5);
        let n = 900;
        let mut x = 0.0;
        let mut y = Vec::new();
        for t in 0..n {
            x = 0.99 * x + 0.1 * rng.normal();
            y.push(if t % 97 == 5 || t == 0 { f64::NAN } else { 3.0 + x + 0.05 * rng.normal() });
        }
        let w: Vec<f64> = (0..n).map(|t| if t % 31 == 0 { 4.0 } else { 1.0 }).collect();
        let dt: Vec<f64> = (0..n).map(|t| if t % 300 == 299 { 57.0 } else { 1.0 }).collect();
        let obs = Observations { y: &y, p: 1, dt: Some(&dt), h_scale: Some(&w) };
        for spec in ["local-level+arma(1,0)", "local-trend", "arma(2,0)", "arma(1,1)"] {
            let spec: ModelSpec = spec.parse().unwrap();
            let k = spec.param_names().len();
            let models: Vec<StateSpace> = (0..11)
                .map(|i| {
                    let mut p = vec![0.0; k];
                    let mut coef = 0.2 + 0.06 * i as f64; // the first coefficient; later ones -0.1
                    for (j, (_, kind)) in spec.params().into_iter().enumerate() {
                        p[j] = match kind {
                            crate::ssm::spec::ParamKind::Variance => 0.01 * (1.0 + i as f64 + j as f64),
                            _ => std::mem::replace(&mut coef, -0.1),
                        };
                    }
                    spec.build(&p).unwrap()
                })
                .collect();
            let mut got = Vec::new();
            concentrated_logliks(&models, &obs, &mut FilterOutput::default(), &mut got);
            // The baseline build of the loop gives the same bits as the
            // dispatched one (AVX2 where the processor has it).
            let mut buf = FilterOutput::default();
            let mut taken: Vec<(Handoff, Sums, &StateSpace)> = models[..8]
                .iter()
                .map(|m| {
                    let h = two_state_handoff(m, &obs, &mut buf).unwrap();
                    (h, Sums::of(&buf), m)
                })
                .collect();
            let plain = lockstep::<8>(&mut taken, &obs);
            for (a, b) in plain.iter().zip(&got) {
                assert_eq!(a.0.to_bits(), b.0.to_bits(), "{spec}");
            }
            for (model, (ll, nobs)) in models.iter().zip(&got) {
                let f = filter(model, &obs, &FilterOptions::loglik_only()).unwrap();
                let want = f.concentrated_loglik();
                assert_eq!(*nobs, f.nobs, "{spec}");
                assert!((ll - want).abs() <= 1e-9 * want.abs(), "{spec}: lanes {ll} vs filter {want}");
            }
        }
    }
}
