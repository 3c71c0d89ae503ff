#!/usr/bin/env python3
"""Side-by-side speed comparison: tagwright's state-space core vs statsmodels.

Usage:
  python core/benches/vs_statsmodels.py [--quick] [--statsmodels-only]
                                         [--json-out FILE] [--keep-data DIR]

Steps:
  (a) generate the benchmark series with a fixed seed and write each as a CSV
      file (one value per line, ``nan`` for a missing value) into a temporary
      directory;
  (b) time statsmodels on them (median of a few repetitions; the model object
      is built once outside the timed region, only ``smooth``/``fit`` is
      timed);
  (c) run the Rust timing binary on the same files.  Its path is $TIMING_BIN,
      or target/release/examples/ssm_timing under the repository root.  It is
      called as ``ssm_timing <task> <csv-file> [params...]`` and prints one JSON
      object {"task": str, "n": int, "reps": int, "seconds": float}, seconds
      being the median time of one repetition;
  (d) print a table with the ratio statsmodels / tagwright against the
      targets, each marked PASS or BELOW.

Exit status: 0 when it ran (whatever the ratios), 2 when the timing binary is
missing or fails, 1 on another error.  Build the binary first (see
vs_statsmodels.sh).
"""

import argparse
import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np
import statsmodels
import statsmodels.api as sm

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEFAULT_BIN = os.path.join(REPO, "target", "release", "examples", "ssm_timing")
SEED = 20261210

LL_S2EPS, LL_S2ETA = 1.0, 0.1
ARMA_PHI, ARMA_THETA, ARMA_S2 = [0.5, -0.3], [0.4], 1.0


# --------------------------------------------------------------- data (a)

def sim_local_level(rng, n, s2eps, s2eta, level0=0.0):
    eta = rng.standard_normal(n) * math.sqrt(s2eta)
    eps = rng.standard_normal(n) * math.sqrt(s2eps)
    mu = level0 + np.concatenate(([0.0], np.cumsum(eta[:-1])))
    return mu + eps


def sim_arma(rng, n, phi, theta, s2, burn=500):
    """x_t = sum phi_i x_{t-i} + e_t + sum theta_j e_{t-j} (zero start, burn-in)."""
    from scipy.signal import lfilter
    e = rng.standard_normal(n + burn) * math.sqrt(s2)
    x = lfilter(np.r_[1.0, theta], np.r_[1.0, -np.asarray(phi)], e)
    return x[burn:]


def write_csv(path, y):
    with open(path, "w", encoding="ascii") as f:
        for v in y:
            f.write("nan\n" if not math.isfinite(v) else repr(float(v)) + "\n")


def make_data(tmp, quick):
    rng = np.random.default_rng(SEED)
    n_big = 20_000 if quick else 100_000
    n_fit = 2_000 if quick else 10_000
    series = {
        "ll_smooth": sim_local_level(rng, n_big, LL_S2EPS, LL_S2ETA, 100.0),
        "ll_fit": sim_local_level(rng, n_fit, LL_S2EPS, LL_S2ETA, 100.0),
        "arma_smooth": sim_arma(rng, n_big, ARMA_PHI, ARMA_THETA, ARMA_S2),
        "arma_fit": sim_arma(rng, n_fit, ARMA_PHI, ARMA_THETA, ARMA_S2),
    }
    files = {}
    for name, y in series.items():
        path = os.path.join(tmp, name + ".csv")
        write_csv(path, y)
        files[name] = path
    return series, files


# ---------------------------------------------------------- statsmodels (b)

def median_time(fn, reps):
    times = []
    for _ in range(reps):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def fmt(x):
    return repr(float(x))


def tasks(series, files, quick):
    """(key, description, target ratio, statsmodels callable, reps, rust argv)."""
    r = 2 if quick else 1
    ll_big = sm.tsa.UnobservedComponents(series["ll_smooth"], "local level",
                                         use_exact_diffuse=True)
    ll_fit = sm.tsa.UnobservedComponents(series["ll_fit"], "local level",
                                         use_exact_diffuse=True)
    arma_big = sm.tsa.SARIMAX(series["arma_smooth"], order=(2, 0, 1), trend="n")
    arma_fit = sm.tsa.SARIMAX(series["arma_fit"], order=(2, 0, 1), trend="n")
    arma_params = ARMA_PHI + ARMA_THETA + [ARMA_S2]
    return [
        ("ll-smooth", "local level filter+smoother (exact diffuse)", 200.0,
         lambda: ll_big.smooth([LL_S2EPS, LL_S2ETA]), 7 * r,
         ["ll-smooth", files["ll_smooth"], fmt(LL_S2EPS), fmt(LL_S2ETA)],
         len(series["ll_smooth"]), False),
        ("ll-fit", "local level ML fit", 100.0,
         lambda: ll_fit.fit(disp=False), 7 * r,
         ["ll-fit", files["ll_fit"]], len(series["ll_fit"]), True),
        ("arma-smooth", "ARMA(2,1) filter+smoother (general path)", 20.0,
         lambda: arma_big.smooth(arma_params), 5 * r,
         ["arma-smooth", files["arma_smooth"], "2", "1"]
         + [fmt(v) for v in arma_params],
         len(series["arma_smooth"]), False),
        ("arma-fit", "ARMA(2,1) ML fit (general path)", 20.0,
         lambda: arma_fit.fit(disp=False), 5 * r,
         ["arma-fit", files["arma_fit"], "2", "1"], len(series["arma_fit"]), True),
    ]


# ------------------------------------------------------------------ rust (c)

def run_rust(binary, argv, n):
    cmd = [binary] + argv
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    except OSError as e:
        raise RuntimeError(f"cannot run {cmd[0]}: {e}") from e
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited with {proc.returncode}:\n"
                           f"{proc.stderr.strip()}")
    lines = [ln for ln in proc.stdout.splitlines() if ln.strip()]
    if not lines:
        raise RuntimeError(f"{' '.join(cmd)} printed nothing on stdout")
    try:
        obj = json.loads(lines[-1])
    except json.JSONDecodeError as e:
        raise RuntimeError(f"{' '.join(cmd)} printed non-JSON: {lines[-1]!r}") from e
    for key, typ in (("task", str), ("n", int), ("reps", int), ("seconds", (int, float))):
        if not isinstance(obj.get(key), typ):
            raise RuntimeError(f"{' '.join(cmd)}: missing or bad '{key}' in {obj!r}")
    if obj["task"] != argv[0]:
        raise RuntimeError(f"task mismatch: asked {argv[0]!r}, got {obj['task']!r}")
    if obj["n"] != n:
        raise RuntimeError(f"{argv[0]}: binary read n={obj['n']}, file has {n}")
    if not obj["seconds"] > 0:
        raise RuntimeError(f"{argv[0]}: non-positive time {obj['seconds']!r}")
    return obj


# ---------------------------------------------------------------- main (d)

def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help="smaller series (n=20,000 / 2,000) for a smoke run")
    ap.add_argument("--statsmodels-only", action="store_true",
                    help="time statsmodels only (no Rust binary needed)")
    ap.add_argument("--json-out", help="also write the results as JSON here")
    ap.add_argument("--keep-data", help="write the CSV files here and keep them")
    args = ap.parse_args(argv)

    binary = os.environ.get("TIMING_BIN", DEFAULT_BIN)
    if not args.statsmodels_only and not (os.path.isfile(binary)
                                          and os.access(binary, os.X_OK)):
        print(f"error: timing binary not found or not executable: {binary}\n"
              "build it with: cargo build --release -p tagwright --example "
              "ssm_timing  (or set TIMING_BIN)", file=sys.stderr)
        return 2

    warnings.simplefilter("ignore")  # convergence chatter from statsmodels fits
    print(f"statsmodels {statsmodels.__version__}, numpy {np.__version__}, "
          f"seed {SEED}{', quick' if args.quick else ''}")
    print(f"timing binary: {'(skipped)' if args.statsmodels_only else binary}")

    rows = []
    with tempfile.TemporaryDirectory(prefix="tagwright-bench-") as tmp:
        datadir = args.keep_data or tmp
        os.makedirs(datadir, exist_ok=True)
        series, files = make_data(datadir, args.quick)
        for key, desc, target, fn, reps, rargv, n, is_fit in tasks(series, files,
                                                                   args.quick):
            fn()  # warm-up (imports, caches)
            sm_s = median_time(fn, reps)
            row = {"task": key, "description": desc, "n": n, "target": target,
                   "statsmodels_seconds": sm_s, "statsmodels_reps": reps,
                   "per": "fit" if is_fit else "point"}
            if not args.statsmodels_only:
                try:
                    rust = run_rust(binary, rargv, n)
                except RuntimeError as e:
                    print(f"error: {e}", file=sys.stderr)
                    return 2
                row["tagwright_seconds"] = float(rust["seconds"])
                row["tagwright_reps"] = rust["reps"]
                row["ratio"] = sm_s / float(rust["seconds"])
                row["verdict"] = "PASS" if row["ratio"] >= target else "BELOW"
            rows.append(row)
            print(f"  done {key} (n={n}): statsmodels {sm_s:.4g} s", flush=True)

    print()
    hdr = (f"{'task':<12} {'n':>7} {'statsmodels s':>14} {'sm s/unit':>12} "
           f"{'tagwright s':>12} {'ratio':>9} {'target':>8}  verdict")
    print(hdr)
    print("-" * len(hdr))
    for r in rows:
        per = r["statsmodels_seconds"] / (r["n"] if r["per"] == "point" else 1)
        unit = "/pt" if r["per"] == "point" else "/fit"
        tw = f"{r['tagwright_seconds']:.4g}" if "tagwright_seconds" in r else "-"
        ratio = f"{r['ratio']:.1f}x" if "ratio" in r else "-"
        print(f"{r['task']:<12} {r['n']:>7} {r['statsmodels_seconds']:>14.4g} "
              f"{per:>8.3g}{unit:<4} {tw:>12} {ratio:>9} {'>=' + format(r['target'], 'g') + 'x':>8}  "
              f"{r.get('verdict', '-')}")
    print("\nratio = statsmodels seconds / tagwright seconds for the same task "
          "and file;\nstatsmodels smooth() computes the filter and the smoother "
          "with variances; fit() uses its defaults (lbfgs).")

    if args.json_out:
        with open(args.json_out, "w", encoding="utf-8") as f:
            json.dump({"seed": SEED, "quick": args.quick,
                       "statsmodels": statsmodels.__version__, "rows": rows},
                      f, indent=1, sort_keys=True)
            f.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
