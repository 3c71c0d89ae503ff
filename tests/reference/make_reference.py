#!/usr/bin/env python3
"""Generate the external reference values used by tagwright's Rust tests.

Usage: python make_reference.py [--out DIR]   (default DIR: this script's folder)

Every value here comes from an independent implementation (statsmodels, with
the versions pinned in requirements.txt) or from a published/closed-form
result, and each JSON file names its source.  Every random source is seeded,
and the output is deterministic: keys are sorted and floats are written with
Python's shortest round-trip repr.  Missing observations are written as null.
All indices are 0-based unless the key ends in ``_1based``.

Conventions shared with tagwright:
  * state-space time index t = 0..n-1; ``predicted_*`` at t is the one-step
    prediction of the state at t from y_0..y_{t-1} (statsmodels
    ``predicted_state[:, :n]``);
  * ARMA: x_t = phi_1 x_{t-1} + ... + phi_p x_{t-p} + e_t + theta_1 e_{t-1}
    + ... + theta_q e_{t-q},  e_t ~ N(0, sigma2)  (the same signs as
    statsmodels' SARIMAX ar.L*/ma.L* parameters).
"""

import argparse
import json
import math
import os
import sys
import warnings

import numpy as np
import scipy
import statsmodels
import statsmodels.api as sm
from statsmodels.datasets import nile as nile_dataset
from statsmodels.tsa.arima_process import arma_acovf

GENERATED_BY = "tests/reference/make_reference.py"
SM = f"statsmodels {statsmodels.__version__}"
ENV = (f"{SM}, numpy {np.__version__}, scipy {scipy.__version__}, "
       f"Python {sys.version_info.major}.{sys.version_info.minor}")

LOGLIK_CONVENTION = (
    "statsmodels log-likelihood = sum over observed t of llf_obs[t]; a missing "
    "observation contributes 0 (no 2*pi term). With use_exact_diffuse=True this "
    "is the diffuse log-likelihood of Durbin & Koopman (2012) eq. (7.4): every "
    "observed t contributes -0.5*log(2*pi); a diffuse period t < nobs_diffuse "
    "contributes -0.5*(log(2*pi) + log F_inf,t) (F_inf,t = 1 for these models, "
    "so exactly -0.5*log(2*pi)) and no v^2/F term; t >= nobs_diffuse contributes "
    "-0.5*(log(2*pi) + log F_t + v_t^2/F_t)."
)


# ----------------------------------------------------------------- helpers

def flist(a):
    """Plain list of floats, non-finite -> None (JSON null)."""
    out = []
    for x in np.asarray(a, dtype=float).ravel():
        out.append(float(x) if math.isfinite(x) else None)
    return out


def ilist(a):
    return [int(x) for x in a]


def write_json(path, obj):
    with open(path, "w", encoding="utf-8") as f:
        json.dump(obj, f, sort_keys=True, indent=1, allow_nan=False)
        f.write("\n")


def named_mle(best, names, fitdesc):
    """The fitted parameters under our names (in the model's parameter
    order), the log-likelihood and how the optimum was found."""
    out = {name: float(v) for name, v in zip(names, best.params)}
    out["loglik"] = float(best.llf)
    out["optimiser"] = fitdesc
    return out


def tight_fit(model, start_params=None):
    """Maximise the statsmodels likelihood tightly.

    Runs L-BFGS-B with tight tolerances from the default start, then polishes
    with Nelder-Mead and BFGS from the best point so far, and returns the
    result with the highest log-likelihood together with a description.
    """
    desc = []
    results = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = model.fit(start_params, method="lbfgs", maxiter=5000, pgtol=1e-10,
                      factr=10.0, disp=False)
        results.append(("lbfgs(pgtol=1e-10,factr=10)", r))
        r = model.fit(r.params, method="nm", maxiter=20000, xtol=1e-10,
                      ftol=1e-13, disp=False)
        results.append(("nm(xtol=1e-10,ftol=1e-13)", r))
        r = model.fit(r.params, method="bfgs", maxiter=5000, gtol=1e-10,
                      disp=False)
        results.append(("bfgs(gtol=1e-10)", r))
    best_name, best = results[0]
    for name, r in results[1:]:
        if r.llf > best.llf + 1e-12:
            best_name, best = name, r
    desc = ("statsmodels fit: lbfgs(pgtol=1e-10, factr=10) from default start "
            "params, then nm(xtol=1e-10, ftol=1e-13), then bfgs(gtol=1e-10), each "
            "from the previous optimum; kept the highest llf (here: "
            f"{best_name})")
    return best, desc


def state_arrays(res, n, idx=0, prefix=""):
    """State summaries of state element `idx` for t = 0..n-1."""
    return {
        prefix + "predicted_state": flist(res.predicted_state[idx, :n]),
        prefix + "predicted_var": flist(res.predicted_state_cov[idx, idx, :n]),
        prefix + "filtered_state": flist(res.filtered_state[idx, :n]),
        prefix + "filtered_var": flist(res.filtered_state_cov[idx, idx, :n]),
        prefix + "smoothed_state": flist(res.smoothed_state[idx, :n]),
        prefix + "smoothed_var": flist(res.smoothed_state_cov[idx, idx, :n]),
    }


# -------------------------------------------------------------------- Nile

NILE_BOOK = {"sigma2_eps": 15099.0, "sigma2_eta": 1469.1}
NILE_MISSING_1BASED = list(range(21, 41)) + list(range(61, 81))


def nile_fixed_block(y, params):
    mod = sm.tsa.UnobservedComponents(y, "local level", use_exact_diffuse=True)
    res = mod.smooth(params)
    n = len(y)
    out = {
        "loglik": float(res.llf),
        "loglik_obs": flist(res.llf_obs),
        "nobs_diffuse": int(res.nobs_diffuse),
        "forecast_error": flist(res.forecasts_error[0, :n]),
        "forecast_error_var": flist(res.forecasts_error_cov[0, 0, :n]),
        "forecast_error_diffuse_var": flist(res.forecasts_error_diffuse_cov[0, 0, :n]),
        "predicted_diffuse_var": flist(res.predicted_diffuse_state_cov[0, 0, :n]),
    }
    out.update(state_arrays(res, n))
    return out


def make_nile():
    y = nile_dataset.load_pandas().data["volume"].to_numpy(dtype=float)
    assert len(y) == 100
    params = [NILE_BOOK["sigma2_eps"], NILE_BOOK["sigma2_eta"]]

    fixed = nile_fixed_block(y, params)

    mod = sm.tsa.UnobservedComponents(y, "local level", use_exact_diffuse=True)
    assert list(mod.param_names) == ["sigma2.irregular", "sigma2.level"]
    best, fitdesc = tight_fit(mod)
    mle = {
        "sigma2_eps": float(best.params[0]),
        "sigma2_eta": float(best.params[1]),
        "loglik": float(best.llf),
        "optimiser": fitdesc,
        "rel_diff_from_book": {
            "sigma2_eps": float(best.params[0] / NILE_BOOK["sigma2_eps"] - 1.0),
            "sigma2_eta": float(best.params[1] / NILE_BOOK["sigma2_eta"] - 1.0),
        },
    }

    ym = y.copy()
    miss0 = [i - 1 for i in NILE_MISSING_1BASED]
    ym[miss0] = np.nan
    missing = nile_fixed_block(ym, params)
    missing["y"] = flist(ym)
    missing["missing_1based"] = NILE_MISSING_1BASED
    missing["source"] = (
        f"{SM} UnobservedComponents(y, 'local level', use_exact_diffuse=True)"
        ".smooth([15099, 1469.1]) with y[t] = NaN for the missing times "
        "(Durbin & Koopman (2012) §2.7 layout: 1-based 21-40 and 61-80)")

    return {
        "source": (
            f"{SM} UnobservedComponents(y, 'local level', use_exact_diffuse=True); "
            "data: statsmodels.datasets.nile (Nile annual flow at Aswan, "
            "1871-1970, n=100); param order [sigma2.irregular, sigma2.level]; "
            f"no random numbers. Environment: {ENV}"),
        "generated_by": GENERATED_BY,
        "book": dict(NILE_BOOK, ref=("Durbin & Koopman (2012) §2.10 "
                                     "(values as quoted in the project issue)")),
        "years": list(range(1871, 1971)),
        "y": flist(y),
        "fixed_params": {"sigma2_eps": params[0], "sigma2_eta": params[1]},
        "fixed": fixed,
        "mle": mle,
        "missing": missing,
        "notes": (
            "Index t is 0-based (t=0 is 1871). predicted_state[t] = a_t, the "
            "prediction of the level at t from y_0..y_{t-1} (statsmodels "
            "predicted_state[0,:n]); predicted_var = its finite part P_*,t "
            "(statsmodels predicted_state_cov) and predicted_diffuse_var = the "
            "diffuse part P_inf,t (statsmodels predicted_diffuse_state_cov), so "
            "the full P_t = kappa*P_inf,t + P_*,t with kappa -> infinity. With "
            "exact diffuse initialisation a_0 = 0, P_*,0 = 0, P_inf,0 = 1 and "
            "nobs_diffuse = 1. In the diffuse period (t < nobs_diffuse) "
            "forecast_error[0] = y_0 - a_0 = y_0, forecast_error_var[0] = "
            "F_*,0 = Z P_*,0 Z' + H = sigma2_eps (finite part only), and "
            "forecast_error_diffuse_var[0] = F_inf,0 = 1; the true F_0 is "
            "infinite, so v_0 and F_0 must not be used as a standardised "
            "residual. filtered_* at t=0 are the exact-diffuse limits "
            "(a_0|0 = y_0, P_0|0 = sigma2_eps). " + LOGLIK_CONVENTION +
            " For Nile: loglik = -0.5*100*log(2*pi) - 0.5*sum_{t=1..99} "
            "(log F_t + v_t^2/F_t). In 'missing', the 40 missing times "
            "contribute 0, so -0.5*log(2*pi) is counted 60 times, and at a "
            "missing t forecast_error is null while forecast_error_var is still "
            "the prediction variance P_t + sigma2_eps."),
    }


# ------------------------------------------------------------------- ARMA

ARMA_SEED = 20261202
ARMA_TRUE = {"phi": [0.5, -0.3], "theta": [0.4], "sigma2": 2.0}
ARMA_POINT2 = [0.3, 0.2, -0.5, 1.5]
ARMA_BURN = 500


def simulate_arma(rng, n, phi, theta, sigma2, burn):
    """Own recursion: x_t = sum phi_i x_{t-i} + e_t + sum theta_j e_{t-j},
    started from zeros and run `burn` steps before the kept part."""
    p, q = len(phi), len(theta)
    e = rng.standard_normal(n + burn) * math.sqrt(sigma2)
    x = np.zeros(n + burn)
    for t in range(n + burn):
        v = e[t]
        for i in range(p):
            if t - 1 - i >= 0:
                v += phi[i] * x[t - 1 - i]
        for j in range(q):
            if t - 1 - j >= 0:
                v += theta[j] * e[t - 1 - j]
        x[t] = v
    return x[burn:]


def arma_fixed(y, params):
    mod = sm.tsa.SARIMAX(y, order=(2, 0, 1), trend="n")
    assert list(mod.param_names) == ["ar.L1", "ar.L2", "ma.L1", "sigma2"]
    return float(mod.loglike(np.asarray(params, dtype=float)))


def arma_block(y):
    p1 = ARMA_TRUE["phi"] + ARMA_TRUE["theta"] + [ARMA_TRUE["sigma2"]]
    fixed = {
        "at_true": {"params": p1, "loglik": arma_fixed(y, p1)},
        "at_point2": {"params": ARMA_POINT2, "loglik": arma_fixed(y, ARMA_POINT2)},
        "params_order": "[phi1, phi2, theta1, sigma2]",
    }
    mod = sm.tsa.SARIMAX(y, order=(2, 0, 1), trend="n")
    best, fitdesc = tight_fit(mod)
    mle = {
        "phi": flist(best.params[:2]),
        "theta": flist(best.params[2:3]),
        "sigma2": float(best.params[3]),
        "loglik": float(best.llf),
        "optimiser": fitdesc,
    }
    return fixed, mle


def make_arma21():
    rng = np.random.default_rng(ARMA_SEED)
    n = 1000
    y = simulate_arma(rng, n, ARMA_TRUE["phi"], ARMA_TRUE["theta"],
                      ARMA_TRUE["sigma2"], ARMA_BURN)
    fixed, mle = arma_block(y)

    # The missing pattern is drawn from the same generator, after the noise.
    miss = np.sort(rng.choice(n, size=100, replace=False))
    ym = y.copy()
    ym[miss] = np.nan
    mfixed, mmle = arma_block(ym)

    return {
        "source": (
            f"{SM} SARIMAX(y, order=(2,0,1), trend='n') with its default "
            "stationary initialisation of the ARMA state (enforce_stationarity="
            "True, enforce_invertibility=True); log-likelihood from "
            "SARIMAX.loglike(params), param order [ar.L1, ar.L2, ma.L1, sigma2]. "
            f"Data: own ARMA recursion, numpy.random.default_rng({ARMA_SEED})"
            f".standard_normal({n}+{ARMA_BURN})*sqrt(sigma2), zero start, first "
            f"{ARMA_BURN} values discarded as burn-in. Missing pattern: "
            "np.sort(rng.choice(1000, 100, replace=False)) from the same "
            f"generator after the noise draw. Environment: {ENV}"),
        "generated_by": GENERATED_BY,
        "convention": ("x_t = phi1 x_{t-1} + phi2 x_{t-2} + e_t + theta1 e_{t-1}, "
                       "e_t ~ N(0, sigma2), zero mean"),
        "seed": ARMA_SEED,
        "simulation": (f"own recursion with {ARMA_BURN}-step burn-in from zeros "
                       "(not statsmodels ArmaProcess)"),
        "true": dict(ARMA_TRUE),
        "y": flist(y),
        "fixed": fixed,
        "mle": mle,
        "missing": {
            "y": flist(ym),
            "missing_idx": ilist(miss),
            "fixed": mfixed,
            "mle": mmle,
        },
        "notes": ("Exact Gaussian log-likelihood, full (not conditional): "
                  "sum over observed t of -0.5*(log(2*pi) + log F_t + v_t^2/F_t); "
                  "missing times contribute 0. No diffuse part (stationary "
                  "initialisation)."),
    }


# -------------------------------------------------------------------- LLT

LLT_SEED = 20261203
LLT_TRUE = {"sigma2_eps": 4.0, "sigma2_eta": 0.5, "sigma2_zeta": 0.01,
            "mu_1": 100.0, "beta_1": 0.1}


def make_llt():
    rng = np.random.default_rng(LLT_SEED)
    n = 500
    eps = rng.standard_normal(n) * math.sqrt(LLT_TRUE["sigma2_eps"])
    eta = rng.standard_normal(n) * math.sqrt(LLT_TRUE["sigma2_eta"])
    zeta = rng.standard_normal(n) * math.sqrt(LLT_TRUE["sigma2_zeta"])
    mu, beta = LLT_TRUE["mu_1"], LLT_TRUE["beta_1"]
    y = np.empty(n)
    for t in range(n):
        y[t] = mu + eps[t]
        mu, beta = mu + beta + eta[t], beta + zeta[t]

    mod = sm.tsa.UnobservedComponents(y, "local linear trend",
                                      use_exact_diffuse=True)
    assert list(mod.param_names) == ["sigma2.irregular", "sigma2.level",
                                     "sigma2.trend"]
    p = [LLT_TRUE["sigma2_eps"], LLT_TRUE["sigma2_eta"], LLT_TRUE["sigma2_zeta"]]
    res = mod.smooth(p)
    fixed = {
        "loglik": float(res.llf),
        "loglik_obs": flist(res.llf_obs),
        "nobs_diffuse": int(res.nobs_diffuse),
        "smoothed_level": flist(res.smoothed_state[0, :n]),
        "smoothed_level_var": flist(res.smoothed_state_cov[0, 0, :n]),
        "filtered_level": flist(res.filtered_state[0, :n]),
        "smoothed_slope": flist(res.smoothed_state[1, :n]),
    }
    best, fitdesc = tight_fit(mod)
    mle = {
        "sigma2_eps": float(best.params[0]),
        "sigma2_eta": float(best.params[1]),
        "sigma2_zeta": float(best.params[2]),
        "loglik": float(best.llf),
        "smoothed_level": flist(best.smoothed_state[0, :n]),
        "optimiser": fitdesc,
    }
    return {
        "source": (
            f"{SM} UnobservedComponents(y, 'local linear trend', "
            "use_exact_diffuse=True); param order [sigma2.irregular, "
            "sigma2.level, sigma2.trend]. Data: numpy.random.default_rng("
            f"{LLT_SEED}); eps, eta, zeta drawn in that order as "
            "standard_normal(500)*sqrt(var). Environment: " + ENV),
        "generated_by": GENERATED_BY,
        "model": ("y_t = mu_t + eps_t; mu_{t+1} = mu_t + beta_t + eta_t; "
                  "beta_{t+1} = beta_t + zeta_t; t = 0..n-1 with mu_0 = 100, "
                  "beta_0 = 0.1 (the brief's mu_1, beta_1 = first time point)"),
        "seed": LLT_SEED,
        "true": dict(LLT_TRUE),
        "y": flist(y),
        "fixed": fixed,
        "mle": mle,
        "notes": ("State order [level, slope]. nobs_diffuse = 2 (both states "
                  "diffuse). " + LOGLIK_CONVENTION),
    }


# -------------------------------------------------- irregular local level

IRR_SEED = 20261204
IRR_TRUE = {"sigma2_eps": 1.0, "sigma2_eta": 0.25, "level_0": 50.0}
IRR_KEEP = 0.65


def make_ll_irregular():
    rng = np.random.default_rng(IRR_SEED)
    grid_n = 600
    eps = rng.standard_normal(grid_n) * math.sqrt(IRR_TRUE["sigma2_eps"])
    eta = rng.standard_normal(grid_n) * math.sqrt(IRR_TRUE["sigma2_eta"])
    mu = np.empty(grid_n)
    level = IRR_TRUE["level_0"]
    for k in range(grid_n):
        mu[k] = level
        level += eta[k]
    yfull = mu + eps
    keep = rng.random(grid_n) < IRR_KEEP
    keep[0] = True
    times = np.flatnonzero(keep)

    ygrid = np.where(keep, yfull, np.nan)
    mod = sm.tsa.UnobservedComponents(ygrid, "local level",
                                      use_exact_diffuse=True)
    p = [IRR_TRUE["sigma2_eps"], IRR_TRUE["sigma2_eta"]]
    res = mod.smooth(p)
    fixed = {
        "loglik": float(res.llf),
        "nobs_diffuse": int(res.nobs_diffuse),
        "filtered_state": flist(res.filtered_state[0, times]),
        "filtered_var": flist(res.filtered_state_cov[0, 0, times]),
        "smoothed_state": flist(res.smoothed_state[0, times]),
        "smoothed_var": flist(res.smoothed_state_cov[0, 0, times]),
    }
    best, fitdesc = tight_fit(mod)
    mle = named_mle(best, ["sigma2_eps", "sigma2_eta"], fitdesc)
    return {
        "source": (
            f"{SM} UnobservedComponents(y_grid, 'local level', "
            "use_exact_diffuse=True) on the full regular grid of 600 points "
            "with NaN at the grid points that are not observed (exact: a "
            "random-walk level over k grid steps has variance k*sigma2_eta). "
            f"Data: numpy.random.default_rng({IRR_SEED}); eps then eta drawn as "
            "standard_normal(600)*sqrt(var); level_k = 50 + eta_0 + ... + "
            "eta_{k-1}; then keep = rng.random(600) < 0.65 with keep[0] = True. "
            "Environment: " + ENV),
        "generated_by": GENERATED_BY,
        "seed": IRR_SEED,
        "true": dict(IRR_TRUE, keep_probability=IRR_KEEP),
        "grid_n": grid_n,
        "times": ilist(times),
        "y": flist(yfull[times]),
        "fixed": fixed,
        "mle": mle,
        "notes": ("All per-time arrays are at the observation times only "
                  "(same order as 'times'). sigma2_eta is per grid step; the "
                  "gap between consecutive observations is times[i+1]-times[i] "
                  "grid steps. Unobserved grid points contribute nothing to "
                  "the log-likelihood. " + LOGLIK_CONVENTION),
    }


# -------------------------------------------------------------------- ACVF

ACVF_MODELS = [
    ("arma10", [0.7], [], 1.0),
    ("arma21", [0.5, -0.3], [0.4], 2.0),
    ("arma12", [0.6], [0.3, -0.2], 1.0),
    ("arma02", [], [0.5, 0.25], 1.0),
]
ACVF_LAGS = 11


def make_acvf():
    models = {}
    for name, phi, theta, s2 in ACVF_MODELS:
        ar = [1.0] + [-x for x in phi]
        ma = [1.0] + list(theta)
        g = arma_acovf(np.array(ar), np.array(ma), nobs=ACVF_LAGS, sigma2=s2)
        entry = {
            "phi": phi, "theta": theta, "sigma2": s2,
            "statsmodels_ar_poly": ar, "statsmodels_ma_poly": ma,
            "acvf": flist(g),
            "source": (f"{SM} statsmodels.tsa.arima_process.arma_acovf(ar, ma, "
                       f"nobs={ACVF_LAGS}, sigma2={s2})"),
        }
        models[name] = entry

    # Independent textbook values.
    phi, s2 = 0.7, 1.0
    models["arma10"]["closed_form"] = {
        "acvf": [s2 * phi ** h / (1.0 - phi ** 2) for h in range(ACVF_LAGS)],
        "source": ("standard closed form gamma(h) = sigma2*phi^h/(1-phi^2) for a "
                   "causal AR(1) (Brockwell & Davis, Introduction to Time Series "
                   "and Forecasting, §2.x/§3.2; section from memory)"),
    }
    th = [1.0, 0.5, 0.25]
    models["arma02"]["closed_form"] = {
        "acvf": [1.0 * sum(th[j] * th[j + h] for j in range(len(th) - h))
                 if h < len(th) else 0.0 for h in range(ACVF_LAGS)],
        "source": ("standard closed form for an MA(q): gamma(h) = sigma2 * "
                   "sum_j theta_j theta_{j+h} with theta_0 = 1, zero for h > q "
                   "(Brockwell & Davis, §3.2; section from memory)"),
    }
    return {
        "source": (f"{SM} statsmodels.tsa.arima_process.arma_acovf, lags 0..10; "
                   "no random numbers"),
        "generated_by": GENERATED_BY,
        "convention": ("ours: x_t = sum phi_i x_{t-i} + e_t + sum theta_j e_{t-j}. "
                       "statsmodels takes lag polynomials ar = [1, -phi1, ...], "
                       "ma = [1, theta1, ...]; both are recorded per model."),
        "lags": list(range(ACVF_LAGS)),
        "models": models,
    }


# ---------------------------------------------- local level plus AR(1)

LLAR_SEED = 20261205
LLAR_TRUE = {"sigma2_eps": 0.25, "sigma2_eta": 0.01, "phi": 0.9,
             "sigma2_ar": 0.5, "level_0": 20.0}


def make_llar():
    """Local level + AR(1) + noise, the default model of flow, pressure,
    temperature and level tags: a mixed initialisation (the level diffuse,
    the AR state stationary), as tagwright's model has."""
    from statsmodels.tsa.statespace.initialization import Initialization

    rng = np.random.default_rng(LLAR_SEED)
    n = 2000
    eps = rng.standard_normal(n) * math.sqrt(LLAR_TRUE["sigma2_eps"])
    eta = rng.standard_normal(n) * math.sqrt(LLAR_TRUE["sigma2_eta"])
    xi = rng.standard_normal(n) * math.sqrt(LLAR_TRUE["sigma2_ar"])
    phi = LLAR_TRUE["phi"]
    mu = LLAR_TRUE["level_0"]
    x = xi[0] / math.sqrt(1.0 - phi * phi)
    y = np.empty(n)
    for t in range(n):
        y[t] = mu + x + eps[t]
        mu = mu + eta[t]
        x = phi * x + xi[(t + 1) % n]
    missing = np.sort(rng.choice(np.arange(1, n), size=100, replace=False))
    y[missing] = np.nan

    # use_exact_diffuse=True: no log-likelihood burn-in (the default
    # approximate-diffuse set-up drops the first observation's term); the
    # initialisation is then replaced by the mixed one.
    mod = sm.tsa.UnobservedComponents(y, level="llevel", autoregressive=1,
                                      use_exact_diffuse=True)
    assert mod.loglikelihood_burn == 0
    assert list(mod.param_names) == ["sigma2.irregular", "sigma2.level",
                                     "sigma2.ar", "ar.L1"], mod.param_names
    init = Initialization(mod.k_states)
    init.set(0, "diffuse")
    init.set(1, "stationary")
    mod.ssm.initialization = init
    p = [LLAR_TRUE["sigma2_eps"], LLAR_TRUE["sigma2_eta"],
         LLAR_TRUE["sigma2_ar"], phi]
    fixed = {"loglik": float(mod.loglike(p))}
    best, fitdesc = tight_fit(mod, start_params=p)
    mle = named_mle(best, ["sigma2_eps", "sigma2_eta", "sigma2_ar", "phi"],
                    fitdesc)
    return {
        "source": (
            f"{SM} UnobservedComponents(y, level='llevel', autoregressive=1, "
            "use_exact_diffuse=True), then Initialization: state 0 (level) diffuse, state 1 (AR) "
            "stationary; param order [sigma2.irregular, sigma2.level, "
            "sigma2.ar, ar.L1]. Data: numpy.random.default_rng("
            f"{LLAR_SEED}); eps, eta, xi drawn in that order as "
            "standard_normal(2000)*sqrt(var), then 100 missing points "
            "(rng.choice of 1..1999 without replacement). Environment: " + ENV),
        "generated_by": GENERATED_BY,
        "model": ("y_t = mu_t + x_t + eps_t; mu_{t+1} = mu_t + eta_t; "
                  "x_{t+1} = phi x_t + xi_{t+1}; mu_0 = 20, x_0 = xi_0 / "
                  "sqrt(1 - phi^2)"),
        "seed": LLAR_SEED,
        "true": dict(LLAR_TRUE),
        "missing_idx": ilist(missing),
        "y": flist(y),
        "fixed": fixed,
        "mle": mle,
        "notes": ("State order [level, ar]. One diffuse state. The MLE is "
                  "started at the true parameters. " + LOGLIK_CONVENTION),
    }


# -------------------------------------------------------------------- main

MAKERS = {
    "nile.json": make_nile,
    "arma21.json": make_arma21,
    "llt.json": make_llt,
    "ll_irregular.json": make_ll_irregular,
    "acvf.json": make_acvf,
    "llar.json": make_llar,
}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.dirname(os.path.abspath(__file__)),
                    help="output directory (default: this script's directory)")
    args = ap.parse_args(argv)
    os.makedirs(args.out, exist_ok=True)
    for fname, maker in MAKERS.items():
        obj = maker()
        path = os.path.join(args.out, fname)
        write_json(path, obj)
        print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
