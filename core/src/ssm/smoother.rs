//! Fixed-interval state smoothing with exact diffuse initialisation.
//!
//! Backward recursion of Durbin & Koopman (2012) §4.4 (state smoothing, the
//! r_t / N_t form of the fixed-interval smoother, which gives the same
//! means and variances as Rauch, Tung & Striebel 1965 without inverting
//! P_{t+1}), in the univariate form of §6.4.4. For a regular element with
//! L = I - K z'/F:
//!
//! ```text
//! r <- z' v / F + L' r
//! N <- z' z / F + L' N L
//! ```
//!
//! between times r <- T' r, N <- T' N T, and at each time
//!
//! ```text
//! a_hat_t = a_t + P_t r_{t-1},    V_t = P_t - P_t N_{t-1} P_t.
//! ```
//!
//! In the diffuse phase (DK §5.3, eqs. 5.21-5.24 in univariate form) with
//! L0 = I - K_inf z'/F_inf and L1 = (K_inf F*/F_inf - K*) z'/F_inf:
//!
//! ```text
//! r0 <- L0' r0
//! r1 <- z' v / F_inf + L0' r1 + L1' r0
//! N0 <- L0' N0 L0
//! N1 <- z' z / F_inf + L0' N1 L0 + L1' N0 L0
//! N2 <- -z' z F*/F_inf^2 + L0' N2 L0 + L0' N1 L1 + (L0' N1 L1)' + L1' N0 L1
//! a_hat = a + P* r0 + P_inf r1
//! V     = P* - P* N0 P* - (P_inf N1 P*)' - P_inf N1 P* - P_inf N2 P_inf
//! ```
//!
//! and a regular element inside the diffuse phase also sets N1 <- N1 L.

use nalgebra::{allocator::Allocator, Const, DefaultAllocator, Dim, Dyn, OMatrix, OVector, U1};

use super::filter::{clear_negative, congruence2, omat, ovec, tidy, ElemKind, FilterOutput, Path, TwoStateShape};
use super::model::{Observations, StateSpace};
use super::scalar;

/// Smoothed states and covariances, stored like the filter's arrays.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SmootherOutput {
    pub n: usize,
    pub m: usize,
    /// a_hat_t = E(a_t | y_1..y_n) (n x m).
    pub state: Vec<f64>,
    /// V_t = Var(a_t | y_1..y_n) (n x m x m, column-major blocks).
    pub cov: Vec<f64>,
    /// Set before smoothing to also keep `r` and `n_diag` (for auxiliary residuals).
    pub keep_aux: bool,
    /// r_{t-1} of DK (2012) §4.4 at index t (n x m): the smoothing cumulant
    /// after the observations at t, so a_hat_t = a_t + P_t r. Kept only with
    /// `keep_aux`, and meaningful only after the diffuse phase.
    pub r: Vec<f64>,
    /// N_{t-1} at index t (n x m x m, column-major blocks), with `keep_aux`.
    pub n_cum: Vec<f64>,
    /// Set before smoothing to also keep `del` (one observation element per
    /// time only).
    pub keep_del: bool,
    /// Standardised deletion residual of the observation at t (n), with
    /// `keep_del`: u_t / sqrt(D_t) with u_t = (v_t - k_t' r_t) / F_t and
    /// D_t = 1/F_t + k_t' N_t k_t / F_t^2 (DK 2012 §4.5.3 in univariate form;
    /// de Jong & Penzer 1998), where r_t, N_t are the cumulants before the
    /// element at t is taken in (K not divided by F, as the filter stores
    /// it). Computed for regular elements after the diffuse phase; NaN
    /// elsewhere.
    pub del: Vec<f64>,
    /// Set before smoothing (one-element models) to keep only what callers
    /// of the signal read, instead of `state`, `cov`, `r` and `n_cum` (which
    /// stay empty): `sig_mean`, `sig_var` and, with `keep_aux`, `aux`. The
    /// values are those computed from the full arrays (bit for bit, except
    /// the two-state loop's signal and its variance, which it forms from
    /// P z' directly: equal to rounding); a long window then stores 2 to 4
    /// numbers per time instead of 13.
    pub lean: bool,
    /// With `lean`: the smoothed signal z a_hat_t + d (n).
    pub sig_mean: Vec<f64>,
    /// With `lean`: its variance z V_t z', not below zero (n).
    pub sig_var: Vec<f64>,
    /// With `lean` and `keep_aux`: r_j / sqrt(N_jj) at index t (n x m; NaN
    /// where N_jj is not positive), which [`SmootherOutput::state_aux`] reads.
    pub aux: Vec<f64>,
}

impl SmootherOutput {
    /// Sizes the buffers for n times of m states, keeping their capacity.
    pub(crate) fn reset(&mut self, n: usize, m: usize) {
        self.n = n;
        self.m = m;
        let aux = if self.keep_aux { n * m } else { 0 };
        let (full, lean) = if self.lean { (0, n) } else { (n, 0) };
        self.state.resize(full * m, 0.0);
        self.cov.resize(full * m * m, 0.0);
        self.r.resize(if self.lean { 0 } else { aux }, 0.0);
        self.n_cum.resize(if self.lean { 0 } else { aux * m }, 0.0);
        self.sig_mean.resize(lean, 0.0);
        self.sig_var.resize(lean, 0.0);
        self.aux.resize(if self.lean { aux } else { 0 }, 0.0);
        self.del.clear();
        if self.keep_del {
            self.del.resize(n, f64::NAN);
        }
    }

    /// Standardised smoothed disturbance of state `j` between t and t+1
    /// (an auxiliary residual, Harvey & Koopman 1992; de Jong & Penzer 1998):
    /// r_j / sqrt(N_jj) taken at t+1, for a state whose disturbance enters
    /// alone (a random-walk level). NaN without `keep_aux`, at the last time,
    /// or where N_jj is 0.
    pub fn state_aux(&self, t: usize, j: usize) -> f64 {
        let m = self.m;
        if self.lean {
            return if j < m { self.aux.get((t + 1) * m + j).copied().unwrap_or(f64::NAN) } else { f64::NAN };
        }
        let i = (t + 1) * m + j;
        match (self.r.get(i), self.n_cum.get((t + 1) * m * m + j * m + j)) {
            (Some(&r), Some(&n)) => aux_of(r, n),
            _ => f64::NAN,
        }
    }

    /// Smoothed signal z a_hat_t + d for observation element i of the model.
    pub fn signal(&self, model: &StateSpace, t: usize, i: usize) -> f64 {
        let m = self.m;
        if self.lean && i == 0 {
            return self.sig_mean[t];
        }
        let z: Vec<f64> = model.z.row(i).iter().copied().collect();
        signal_of(&z, model.d[i], &self.state[t * m..(t + 1) * m])
    }

    /// Variance of the smoothed signal, z V_t z'.
    pub fn signal_var(&self, model: &StateSpace, t: usize, i: usize) -> f64 {
        let m = self.m;
        if self.lean && i == 0 {
            return self.sig_var[t];
        }
        let z: Vec<f64> = model.z.row(i).iter().copied().collect();
        signal_var_of(&z, &self.cov[t * m * m..(t + 1) * m * m])
    }
}

/// z a + d for one row z of Z and a state a (for loops over many times,
/// with z taken out of the model once).
#[inline]
pub fn signal_of(z: &[f64], d: f64, a: &[f64]) -> f64 {
    d + z.iter().zip(a).map(|(z, a)| z * a).sum::<f64>()
}

/// z V z' for a row z of Z and a column-major m x m block V, not below zero.
#[inline]
pub fn signal_var_of(z: &[f64], v: &[f64]) -> f64 {
    let m = z.len();
    let mut s = 0.0;
    for (c, zc) in z.iter().enumerate() {
        for (r, zr) in z.iter().enumerate() {
            s += zr * v[c * m + r] * zc;
        }
    }
    s.max(0.0)
}

/// Smooths a stored filter run. Panics if `filt` was run without `store`
/// (a programmer error).
pub fn smooth(model: &StateSpace, obs: &Observations, filt: &FilterOutput) -> SmootherOutput {
    let mut out = SmootherOutput::default();
    smooth_into(model, obs, filt, &mut out);
    out
}

/// [`smooth`] into an existing output, reusing its buffers.
pub fn smooth_into(model: &StateSpace, obs: &Observations, filt: &FilterOutput, out: &mut SmootherOutput) {
    assert!(filt.is_stored() || filt.n == 0, "smoothing needs a filter run with store = true");
    let m = model.state_dim();
    // The matrix paths keep the lean arrays as they go; the scalar path
    // fills the full ones, which are then reduced. (`lean` is for
    // one-element models; with more elements the full arrays are kept.)
    let lean = out.lean && filt.p == 1;
    let reduce = lean && filt.path == Path::Scalar;
    out.lean = lean && !reduce;
    match filt.path {
        Path::Scalar => scalar::smooth(model, obs, filt, out),
        Path::Fixed => match m {
            1 => run(Const::<1>, model, obs, filt, out),
            2 => run(Const::<2>, model, obs, filt, out),
            3 => run(Const::<3>, model, obs, filt, out),
            4 => run(Const::<4>, model, obs, filt, out),
            _ => run(Dyn(m), model, obs, filt, out),
        },
        _ => run(Dyn(m), model, obs, filt, out),
    }
    if reduce {
        out.reduce_to_lean(model);
    }
}

impl SmootherOutput {
    /// Computes the lean arrays from the full ones and empties those.
    fn reduce_to_lean(&mut self, model: &StateSpace) {
        let (n, m) = (self.n, self.m);
        let z: Vec<f64> = model.z.row(0).iter().copied().collect();
        let d = model.d[0];
        self.sig_mean = (0..n).map(|t| signal_of(&z, d, &self.state[t * m..(t + 1) * m])).collect();
        self.sig_var = (0..n).map(|t| signal_var_of(&z, &self.cov[t * m * m..(t + 1) * m * m])).collect();
        self.aux.clear();
        if self.keep_aux {
            for t in 0..n {
                for j in 0..m {
                    self.aux.push(aux_of(self.r[t * m + j], self.n_cum[t * m * m + j * m + j]));
                }
            }
        }
        for v in [&mut self.state, &mut self.cov, &mut self.r, &mut self.n_cum] {
            v.clear();
        }
        self.lean = true;
    }
}

/// r_j / sqrt(N_jj), NaN where N_jj is not positive (an auxiliary residual).
#[inline]
fn aux_of(r: f64, n: f64) -> f64 {
    if n > 0.0 {
        r / n.sqrt()
    } else {
        f64::NAN
    }
}

/// [`aux_of`] of two states at once (written lane by lane so that the
/// square roots and divisions can share vector instructions).
#[inline]
fn aux_pair(r: [f64; 2], n: [f64; 2]) -> [f64; 2] {
    let s = [n[0].sqrt(), n[1].sqrt()];
    let q = [r[0] / s[0], r[1] / s[1]];
    [if n[0] > 0.0 { q[0] } else { f64::NAN }, if n[1] > 0.0 { q[1] } else { f64::NAN }]
}

/// u / sqrt(D) of [`SmootherOutput::del`] from the innovation v, its
/// variance f, k' r and k' N k; NaN where D is not positive.
#[inline]
pub(crate) fn deletion_residual(v: f64, f: f64, kr: f64, knk: f64) -> f64 {
    // u / sqrt(D) = ((v - k'r)/F) / sqrt((F + k'Nk)/F^2), F > 0.
    let d = f + knk;
    if d > 0.0 && f > 0.0 {
        (v - kr) / d.sqrt()
    } else {
        f64::NAN
    }
}

fn run<D: Dim>(dim: D, model: &StateSpace, obs: &Observations, filt: &FilterOutput, out: &mut SmootherOutput)
where
    DefaultAllocator: Allocator<D, D> + Allocator<D> + Allocator<U1, D>,
{
    let (n, p, m) = (filt.n, filt.p, filt.m);
    out.reset(n, m);
    let keep_del = out.keep_del && p == 1;
    let lean = out.lean;
    let z_sig: Vec<f64> = model.z.row(0).iter().copied().collect();
    let d_sig = model.d[0];
    let zrows: Vec<OVector<f64, D>> = (0..p).map(|i| ovec(dim, model.z.row(i).iter().cloned())).collect();
    let mut sys = model.step_system();
    let mut tt = omat(dim, &sys.t);
    let mut ttr = tt.transpose();
    let mut cur_dt = 1.0;

    let zero_v = || OVector::<f64, D>::zeros_generic(dim, U1);
    let zero_m = || OMatrix::<f64, D, D>::zeros_generic(dim, dim);
    let (mut r0, mut r1) = (zero_v(), zero_v());
    let (mut n0, mut n1, mut n2) = (zero_m(), zero_m(), zero_m());
    let (mut k, mut u, mut a) = (zero_v(), zero_v(), zero_v());
    let (mut pm, mut v, mut tmp) = (zero_m(), zero_m(), zero_m());
    let mut diffuse_iter = filt.diffuse.iter().rev();

    // After the diffuse phase a two-state, one-element model runs on plain
    // numbers (the general path keeps the matrix code as the tests' reference).
    let mut t_end = n;
    if m == 2 && p == 1 && filt.path == Path::Fixed && filt.diffuse_end < n {
        // Unit loadings (a sum of two one-state blocks) run a copy with
        // them known, as the filter does: the same arithmetic (x * 1 = x)
        // on a shorter chain of dependent operations.
        let unit_z = zrows[0].iter().all(|&z| z == 1.0);
        let run_two = if unit_z { run_two_states::<true> } else { run_two_states::<false> };
        let (r, nn) = run_two(model, obs, filt, out, keep_del, &mut sys, &mut cur_dt);
        r0.copy_from_slice(&r);
        n0.copy_from_slice(&[nn[0], nn[1], nn[1], nn[2]]);
        tt.copy_from_slice(sys.t.as_slice());
        ttr.copy_from(&tt.transpose());
        t_end = filt.diffuse_end;
    }

    for t in (0..t_end).rev() {
        let in_diffuse = t < filt.diffuse_end;
        for i in (0..p).rev() {
            let j = t * p + i;
            let z = &zrows[i];
            match filt.kind[j] {
                ElemKind::Regular => {
                    let (vj, f) = (filt.v[j], filt.f[j]);
                    k.copy_from_slice(&filt.k[j * m..(j + 1) * m]);
                    // L'NL = N - (z u' + u z')/F + z z' (k'Nk)/F^2 with u = N k.
                    u.gemv(1.0, &n0, &k, 0.0);
                    let s = k.dot(&u);
                    let kr = k.dot(&r0);
                    if keep_del && !in_diffuse {
                        out.del[t] = deletion_residual(vj, f, kr, s);
                    }
                    r0.axpy((vj - kr) / f, z, 1.0);
                    n0.ger(-1.0 / f, z, &u, 1.0);
                    n0.ger(-1.0 / f, &u, z, 1.0);
                    n0.ger((s / f + 1.0) / f, z, z, 1.0);
                    if in_diffuse {
                        u.gemv(1.0, &n1, &k, 0.0);
                        n1.ger(-1.0 / f, &u, z, 1.0);
                    }
                }
                ElemKind::Diffuse => {
                    let Some(de) = diffuse_iter.next() else {
                        continue;
                    };
                    debug_assert_eq!((de.t, de.i), (t, i));
                    let (vj, f, fi) = (filt.v[j], filt.f[j], de.f_inf);
                    let ki = ovec(dim, de.k_inf.iter().cloned());
                    k.copy_from_slice(&filt.k[j * m..(j + 1) * m]);
                    let eye = OMatrix::<f64, D, D>::identity_generic(dim, dim);
                    let l0 = &eye - &ki * z.transpose() / fi;
                    let w = (&ki * (f / fi) - &k) / fi;
                    let l1 = &w * z.transpose();
                    let zz = z * z.transpose();
                    let r1n = z * (vj / fi) + l0.transpose() * &r1 + l1.transpose() * &r0;
                    let r0n = l0.transpose() * &r0;
                    let cross = l0.transpose() * &n1 * &l1;
                    let n2n = &zz * (-f / (fi * fi))
                        + l0.transpose() * &n2 * &l0
                        + &cross
                        + cross.transpose()
                        + l1.transpose() * &n0 * &l1;
                    let n1n = &zz / fi + l0.transpose() * &n1 * &l0 + l1.transpose() * &n0 * &l0;
                    let n0n = l0.transpose() * &n0 * &l0;
                    r0 = r0n;
                    r1 = r1n;
                    n0 = n0n;
                    n1 = n1n;
                    n2 = n2n;
                }
                ElemKind::Missing | ElemKind::Degenerate => {}
            }
        }
        // Smoothed state and covariance at t.
        a.copy_from_slice(&filt.a_pred[t * m..(t + 1) * m]);
        pm.copy_from_slice(&filt.p_pred[t * m * m..(t + 1) * m * m]);
        a.gemv(1.0, &pm, &r0, 1.0);
        v.copy_from(&pm);
        tmp.gemm(1.0, &n0, &pm, 0.0);
        v.gemm(-1.0, &pm, &tmp, 1.0);
        if in_diffuse {
            let pinf =
                OMatrix::<f64, D, D>::from_column_slice_generic(dim, dim, &filt.p_inf_pred[t * m * m..(t + 1) * m * m]);
            a.gemv(1.0, &pinf, &r1, 1.0);
            let c = &pinf * &n1 * &pm;
            v -= &c;
            v -= c.transpose();
            v -= &pinf * &n2 * &pinf;
        }
        tidy(&mut v);
        if lean {
            if out.keep_aux {
                for j in 0..m {
                    out.aux[t * m + j] = aux_of(r0[j], n0[(j, j)]);
                }
            }
            out.sig_mean[t] = signal_of(&z_sig, d_sig, a.as_slice());
            out.sig_var[t] = signal_var_of(&z_sig, v.as_slice());
        } else {
            if out.keep_aux {
                out.r[t * m..(t + 1) * m].copy_from_slice(r0.as_slice());
                out.n_cum[t * m * m..(t + 1) * m * m].copy_from_slice(n0.as_slice());
            }
            out.state[t * m..(t + 1) * m].copy_from_slice(a.as_slice());
            out.cov[t * m * m..(t + 1) * m * m].copy_from_slice(v.as_slice());
        }
        // Step back through the transition T_{t-1}: r <- T'r, N <- T'NT.
        if t > 0 {
            let dt = obs.step(t - 1);
            if dt != cur_dt {
                model.system_for_step(dt, &mut sys);
                tt.copy_from_slice(sys.t.as_slice());
                ttr.copy_from(&tt.transpose());
                cur_dt = dt;
            }
            u.gemv(1.0, &ttr, &r0, 0.0);
            r0.copy_from(&u);
            tmp.gemm(1.0, &n0, &tt, 0.0);
            n0.gemm(1.0, &ttr, &tmp, 0.0);
            if t - 1 < filt.diffuse_end {
                u.gemv(1.0, &ttr, &r1, 0.0);
                r1.copy_from(&u);
                tmp.gemm(1.0, &n1, &tt, 0.0);
                n1.gemm(1.0, &ttr, &tmp, 0.0);
                tmp.gemm(1.0, &n2, &tt, 0.0);
                n2.gemm(1.0, &ttr, &tmp, 0.0);
            }
        }
    }
}

/// The backward recursion of [`run`] for a two-state, one-element model
/// from the last time down to the end of the diffuse phase, with r and the
/// symmetric N held as plain numbers, the step back through T and the
/// update at each time folded into one product (M'NM with M = T L), and
/// with `lean` only the signal's mean and variance formed (not the smoothed
/// state and covariance). The results agree with the matrix code's to
/// rounding. Returns r and N (n00, n01, n11) after the step back from the
/// first time it handled.
fn run_two_states<const UNIT_Z: bool>(
    model: &StateSpace,
    obs: &Observations,
    filt: &FilterOutput,
    out: &mut SmootherOutput,
    keep_del: bool,
    sys: &mut super::model::StepSystem,
    cur_dt: &mut f64,
) -> ([f64; 2], [f64; 3]) {
    let n = filt.n;
    let (z0, z1) = (model.z[(0, 0)], model.z[(0, 1)]);
    // T (t00, t10, t01, t11: column by column) and its shape.
    let load = |sys: &super::model::StepSystem| {
        let t = sys.t.as_slice();
        ([t[0], t[1], t[2], t[3]], TwoStateShape::of(t[0], t[2], t[1]))
    };
    let mut system = load(sys);
    // Makes `system` the step system of a step of dt (loaded only when dt
    // is not the one loaded).
    let step_system = |dt: f64, sys: &mut super::model::StepSystem, cur_dt: &mut f64, system: &mut ([f64; 4], _)| {
        if dt != *cur_dt {
            model.system_for_step(dt, sys);
            *system = load(sys);
            *cur_dt = dt;
        }
    };
    // r and N after the observation at t + 1 (zero past the last time).
    let (mut r0, mut r1) = (0.0, 0.0);
    let (mut n00, mut n01, mut n11) = (0.0, 0.0, 0.0);
    let keep_aux = out.keep_aux;
    let lean = out.lean;
    let d_sig = model.d[0];
    // r' = T'r and N' = T'NT, the step back through T alone.
    let step_back = |([t00, t10, t01, t11], shape): ([f64; 4], TwoStateShape),
                     [r0, r1]: [f64; 2],
                     [n00, n01, n11]: [f64; 3]| match shape {
        TwoStateShape::RandomWalkLevel => ([r0, r1 * t11], [n00, n01 * t11, (t11 * n11) * t11]),
        TwoStateShape::Diagonal => ([t00 * r0, t11 * r1], [(t00 * n00) * t00, (t00 * n01) * t11, (t11 * n11) * t11]),
        TwoStateShape::Full => {
            ([t00 * r0 + t10 * r1, t01 * r0 + t11 * r1], congruence2([t00, t10, t01, t11], [n00, n01, n11]))
        }
    };
    for t in (filt.diffuse_end..n).rev() {
        // T_t, the step from t to t + 1 (at the last time r and N are zero
        // and the loaded T stands in).
        if t + 1 < n {
            step_system(obs.step(t), sys, cur_dt, &mut system);
        }
        let ([t00, t10, t01, t11], shape) = system;
        if filt.kind[t] == ElemKind::Regular {
            // With L = I - k z/F and the gain's image g = T k, the step
            // back and the update at t fold into one product with
            // M = T L = T - g z/F:
            //   r <- M'r + z' v/F,   N <- M'NM + z'z/F,
            // whose coefficients do not depend on r or N, so the chain from
            // one time's N to the next is a product and two sums. The
            // deletion residual reads k'r and k'Nk before the update as
            // g'r and g'Ng.
            let (v, f) = (filt.v[t], filt.f[t]);
            let (k0, k1) = (filt.k[2 * t], filt.k[2 * t + 1]);
            let finv = 1.0 / f;
            let [g0, g1] = shape.times([t00, t10, t01, t11], [k0, k1]);
            if keep_del {
                let kr = g0 * r0 + g1 * r1;
                let knk = g0 * (n00 * g0 + n01 * g1) + g1 * (n01 * g0 + n11 * g1);
                out.del[t] = deletion_residual(v, f, kr, knk);
            }
            let (gf0, gf1) = (g0 * finv, g1 * finv);
            let (m00, m01, m10, m11) = if UNIT_Z {
                (t00 - gf0, t01 - gf0, t10 - gf1, t11 - gf1)
            } else {
                (t00 - gf0 * z0, t01 - gf0 * z1, t10 - gf1 * z0, t11 - gf1 * z1)
            };
            let e = v * finv;
            let (ze0, ze1) = if UNIT_Z { (e, e) } else { (z0 * e, z1 * e) };
            let (zz00, zz01, zz11) =
                if UNIT_Z { (finv, finv, finv) } else { (z0 * z0 * finv, z0 * z1 * finv, z1 * z1 * finv) };
            (r0, r1) = ((m00 * r0 + m10 * r1) + ze0, (m01 * r0 + m11 * r1) + ze1);
            let (x00, x01) = (n00 * m00 + n01 * m10, n00 * m01 + n01 * m11);
            let (x10, x11) = (n01 * m00 + n11 * m10, n01 * m01 + n11 * m11);
            (n00, n01, n11) =
                ((m00 * x00 + m10 * x10) + zz00, (m00 * x01 + m10 * x11) + zz01, (m01 * x01 + m11 * x11) + zz11);
        } else if t + 1 < n {
            ([r0, r1], [n00, n01, n11]) = step_back(system, [r0, r1], [n00, n01, n11]);
        }
        let pm = &filt.p_pred[4 * t..4 * t + 4];
        let (p00, p10, p01, p11) = (pm[0], pm[1], pm[2], pm[3]);
        let (a0, a1) = (filt.a_pred[2 * t], filt.a_pred[2 * t + 1]);
        if lean {
            // The signal alone: with w = P z', z a_hat + d = (z a + d) + w'r
            // and z V z' = z P z' - w'N w (V = P - P N P), not below zero.
            let (w0, w1) = if UNIT_Z { (p00 + p01, p10 + p11) } else { (p00 * z0 + p01 * z1, p10 * z0 + p11 * z1) };
            let (za, zw) = if UNIT_Z { (a0 + a1, w0 + w1) } else { (z0 * a0 + z1 * a1, z0 * w0 + z1 * w1) };
            out.sig_mean[t] = (za + d_sig) + (w0 * r0 + w1 * r1);
            out.sig_var[t] = (zw - (w0 * (n00 * w0 + n01 * w1) + w1 * (n01 * w0 + n11 * w1))).max(0.0);
            if keep_aux {
                out.aux[2 * t..2 * t + 2].copy_from_slice(&aux_pair([r0, r1], [n00, n11]));
            }
        } else {
            // Smoothed state and covariance: a + P r, P - P N P.
            let s0 = a0 + p00 * r0 + p01 * r1;
            let s1 = a1 + p10 * r0 + p11 * r1;
            let m00 = n00 * p00 + n01 * p10;
            let m01 = n00 * p01 + n01 * p11;
            let m10 = n01 * p00 + n11 * p10;
            let m11 = n01 * p01 + n11 * p11;
            let v00 = p00 - (p00 * m00 + p01 * m10);
            let v01 = p01 - (p00 * m01 + p01 * m11);
            let v10 = p10 - (p10 * m00 + p11 * m10);
            let v11 = p11 - (p10 * m01 + p11 * m11);
            let off = 0.5 * (v01 + v10);
            out.state[2 * t] = s0;
            out.state[2 * t + 1] = s1;
            out.cov[4 * t..4 * t + 4].copy_from_slice(&[clear_negative(v00), off, off, clear_negative(v11)]);
            if keep_aux {
                out.r[2 * t] = r0;
                out.r[2 * t + 1] = r1;
                out.n_cum[4 * t..4 * t + 4].copy_from_slice(&[n00, n01, n01, n11]);
            }
        }
    }
    // The step back through T_{t-1} from the first time handled.
    let first = filt.diffuse_end;
    if first > 0 && first < n {
        step_system(obs.step(first - 1), sys, cur_dt, &mut system);
        ([r0, r1], [n00, n01, n11]) = step_back(system, [r0, r1], [n00, n01, n11]);
    }
    ([r0, r1], [n00, n01, n11])
}
