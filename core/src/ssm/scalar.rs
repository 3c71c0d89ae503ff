//! Hand-written scalar filter and smoother for models with one state and one
//! observation element (local level, AR(1), a constant). The equations are
//! those of `filter.rs` and `smoother.rs` with every matrix a number; for the
//! local level they reduce to Durbin & Koopman (2012) §2.2 (filter), §2.4
//! (smoother) and §2.9 (diffuse initialisation: a_2 = y_1, P_2 = sigma2_eps +
//! sigma2_eta).

use super::filter::{DiffuseElem, ElemKind, FilterOptions, FilterOutput, Path, DIFFUSE_TOL};
use super::model::{Observations, StateSpace};
use super::smoother::SmootherOutput;

pub(crate) fn filter(model: &StateSpace, obs: &Observations, opts: &FilterOptions, out: &mut FilterOutput) {
    let n = obs.len();
    let store = opts.store;
    out.reset(n, 1, 1, store, Path::Scalar);
    let keep_filt = out.keeps_filtered(store);
    let (z, d, h, c) = (model.z[(0, 0)], model.d[0], model.h[0], model.c[0]);
    let mut sys = model.step_system();
    let (mut tr, mut q, mut cur_dt) = (sys.t[(0, 0)], sys.rqr[(0, 0)], 1.0);
    let mut a = model.a1[0];
    let mut ps = model.p1_star[(0, 0)];
    let mut pi = model.p1_inf[(0, 0)];
    let mut diffuse = pi > 0.0;
    let allow_steady = opts.steady_tol > 0.0;
    let mut steady = false;
    let (mut st_k, mut st_f, mut st_pf, mut st_logf) = (0.0, 0.0, 0.0, 0.0);
    let (mut sum_v2_f, mut sum_log_f, mut nobs) = (0.0, 0.0, 0usize);
    let mut logs = super::filter::LogSum::new();

    let mut t = 0;
    while t < n {
        if steady {
            // Steady state: K, F and P are fixed; only the state moves. Runs
            // while the steps are plain (observed, unit weight, one period).
            let gain = st_k / st_f;
            // a_{t+1} = tr (a + gain v) + c = mc a + bc y + ec: v is off the dependency chain.
            let (mc, bc) = (tr * (1.0 - gain * z), tr * gain);
            let ec = c - bc * d;
            let start = t;
            let mut sum_v2 = 0.0;
            while t < n {
                let y = obs.y[t];
                if y.is_nan() || obs.weight(t, 0) != 1.0 || obs.step(t) != 1.0 {
                    break;
                }
                let v = y - z * a - d;
                if store {
                    out.a_pred[t] = a;
                    out.p_pred[t] = ps;
                    out.v[t] = v;
                    out.f[t] = st_f;
                    out.k[t] = st_k;
                    out.kind[t] = ElemKind::Regular;
                }
                if keep_filt {
                    out.a_filt[t] = a + gain * v;
                    out.p_filt[t] = st_pf;
                }
                a = mc * a + bc * y + ec;
                sum_v2 += v * v;
                t += 1;
            }
            let count = t - start;
            sum_v2_f += sum_v2 / st_f;
            sum_log_f += count as f64 * st_logf;
            nobs += count;
            if t == n {
                break;
            }
        }
        // One full step (the general case, and the step that leaves the steady state).
        if store {
            out.a_pred[t] = a;
            out.p_pred[t] = ps;
            if diffuse {
                out.p_inf_pred.push(pi);
            }
        }
        let y = obs.y[t];
        let w = obs.weight(t, 0);
        let mut plain = !diffuse && !y.is_nan() && w == 1.0;
        if steady && !plain {
            steady = false;
        }
        let p_prev = ps;
        let was_steady = steady;
        if y.is_nan() {
            if store {
                out.v[t] = f64::NAN;
                out.f[t] = f64::NAN;
                out.k[t] = 0.0;
                out.kind[t] = ElemKind::Missing;
            }
        } else {
            let v = y - z * a - d;
            let (k, f) = if steady {
                (st_k, st_f)
            } else {
                let k = ps * z;
                (k, z * k + h * w)
            };
            let ki = pi * z;
            let fi = z * ki;
            if diffuse && fi > DIFFUSE_TOL {
                a += ki * v / fi;
                ps += ki * ki * f / (fi * fi) - 2.0 * k * ki / fi;
                ps = ps.max(0.0);
                pi -= ki * ki / fi;
                out.n_diffuse_obs += 1;
                out.sum_log_f_inf += fi.ln();
                if store {
                    out.v[t] = v;
                    out.f[t] = f;
                    out.k[t] = k;
                    out.kind[t] = ElemKind::Diffuse;
                    out.diffuse.push(DiffuseElem { t, i: 0, f_inf: fi, k_inf: vec![ki] });
                }
            } else if f > 1e-13 * (h * w + ps).max(f64::MIN_POSITIVE) {
                a += k * v / f;
                if !steady {
                    ps = (ps - k * k / f).max(0.0);
                }
                sum_v2_f += v * v / f;
                logs.add(f);
                nobs += 1;
                if store {
                    out.v[t] = v;
                    out.f[t] = f;
                    out.k[t] = k;
                    out.kind[t] = ElemKind::Regular;
                }
            } else if store {
                out.v[t] = v;
                out.f[t] = f;
                out.k[t] = 0.0;
                out.kind[t] = ElemKind::Degenerate;
            }
        }
        if diffuse && pi <= DIFFUSE_TOL {
            diffuse = false;
            pi = 0.0;
            out.diffuse_end = t + 1;
        }
        if keep_filt {
            out.a_filt[t] = a;
            out.p_filt[t] = if steady { st_pf } else { ps };
        }
        let dt = obs.step(t);
        if dt != cur_dt {
            model.system_for_step(dt, &mut sys);
            tr = sys.t[(0, 0)];
            q = sys.rqr[(0, 0)];
            cur_dt = dt;
            steady = false;
            plain = false;
        }
        a = tr * a + c;
        t += 1;
        if steady {
            continue;
        }
        if was_steady {
            ps = st_pf; // the update ran in steady mode; predict from the filtered value
        }
        ps = (tr * tr * ps + q).max(0.0);
        if diffuse {
            pi *= tr * tr;
        }
        if allow_steady && plain && dt == 1.0 && (ps - p_prev).abs() <= opts.steady_tol * ps.max(f64::MIN_POSITIVE) {
            steady = true;
            out.steady_from.get_or_insert(t);
            st_k = ps * z;
            st_f = z * st_k + h;
            st_pf = ps - st_k * st_k / st_f;
            st_logf = st_f.ln();
        }
    }
    if diffuse {
        out.diffuse_end = n;
    }
    out.sum_v2_f = sum_v2_f;
    out.sum_log_f = sum_log_f + logs.total();
    out.nobs = nobs;
    out.finish_loglik(opts.loglik);
}

pub(crate) fn smooth(model: &StateSpace, obs: &Observations, filt: &FilterOutput, out: &mut SmootherOutput) {
    let n = filt.n;
    let z = model.z[(0, 0)];
    out.reset(n, 1);
    let (keep_aux, keep_del) = (out.keep_aux, out.keep_del);
    let (state, cov, aux_r, aux_n, del) = (&mut out.state, &mut out.cov, &mut out.r, &mut out.n_cum, &mut out.del);
    let mut sys = model.step_system();
    let (mut tr, mut cur_dt) = (sys.t[(0, 0)], 1.0);
    let (mut r0, mut n0, mut r1, mut n1, mut n2) = (0.0, 0.0, 0.0, 0.0, 0.0);
    let mut diffuse_iter = filt.diffuse.iter().rev();
    for t in (0..n).rev() {
        let in_diffuse = t < filt.diffuse_end;
        match filt.kind[t] {
            ElemKind::Regular => {
                let (v, f, k) = (filt.v[t], filt.f[t], filt.k[t]);
                if keep_del && !in_diffuse {
                    del[t] = super::smoother::deletion_residual(v, f, k * r0, k * n0 * k);
                }
                let l = 1.0 - k * z / f;
                r0 = z * v / f + l * r0;
                n0 = z * z / f + l * l * n0;
                if in_diffuse {
                    n1 *= l;
                }
            }
            ElemKind::Diffuse => {
                let Some(de) = diffuse_iter.next() else {
                    continue;
                };
                debug_assert_eq!(de.t, t);
                let (fi, ki) = (de.f_inf, de.k_inf[0]);
                let (v, f, k) = (filt.v[t], filt.f[t], filt.k[t]);
                let l0 = 1.0 - ki * z / fi;
                let l1 = (ki * f / fi - k) * z / fi;
                let r1n = z * v / fi + l0 * r1 + l1 * r0;
                let r0n = l0 * r0;
                let n2n = -z * z * f / (fi * fi) + l0 * l0 * n2 + 2.0 * l0 * l1 * n1 + l1 * l1 * n0;
                let n1n = z * z / fi + l0 * l0 * n1 + l1 * l0 * n0;
                let n0n = l0 * l0 * n0;
                (r0, r1, n0, n1, n2) = (r0n, r1n, n0n, n1n, n2n);
            }
            ElemKind::Missing | ElemKind::Degenerate => {}
        }
        let (a, p) = (filt.a_pred[t], filt.p_pred[t]);
        if keep_aux {
            aux_r[t] = r0;
            aux_n[t] = n0;
        }
        if in_diffuse {
            let pinf = filt.p_inf_pred[t];
            state[t] = a + p * r0 + pinf * r1;
            cov[t] = (p - p * p * n0 - 2.0 * pinf * n1 * p - pinf * pinf * n2).max(0.0);
        } else {
            state[t] = a + p * r0;
            cov[t] = (p - p * p * n0).max(0.0);
        }
        if t > 0 {
            let dt = obs.step(t - 1);
            if dt != cur_dt {
                model.system_for_step(dt, &mut sys);
                tr = sys.t[(0, 0)];
                cur_dt = dt;
            }
            r0 *= tr;
            n0 *= tr * tr;
            if t - 1 < filt.diffuse_end {
                r1 *= tr;
                n1 *= tr * tr;
                n2 *= tr * tr;
            }
        }
    }
}
