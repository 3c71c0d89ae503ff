#!/usr/bin/env python3
"""Regenerate the reference JSON files and compare them with the committed ones.

Usage: python check_reference.py [--dir DIR]   (default DIR: this script's folder)

make_reference.py is run into a temporary directory and every leaf value of
every file is compared with the committed file:
  * data (y, times, indices, true/book parameters, integers): exactly;
  * values at fixed parameters (log-likelihoods, filter/smoother arrays,
    autocovariances): 1e-6 relative, scale max(|a|, 1);
  * anything under an "mle" key: 1e-4 relative for log-likelihoods, 1e-2
    relative for estimates (and arrays evaluated at the estimates), scale
    max(|a|, 1);
  * descriptive strings ("source", "notes", "optimiser", ...) are reported
    when they differ but do not fail (they name library versions).
One line is printed per check, then a final line "N passed, N failed".
The exit status is non-zero on any failure or missing file.
"""

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
FILES = ["nile.json", "arma21.json", "llt.json", "ll_irregular.json", "acvf.json",
         "llar.json"]

EXACT_KEYS = {"y", "times", "missing_idx", "missing_1based", "grid_n", "years",
              "true", "book", "seed", "lags", "params", "fixed_params",
              "nobs_diffuse", "phi", "theta", "sigma2", "statsmodels_ar_poly",
              "statsmodels_ma_poly"}
INFO_STRING_KEYS = {"source", "notes", "optimiser", "ref", "simulation",
                    "convention", "model", "params_order", "generated_by"}

TOL_FIXED = 1e-6
TOL_MLE_EST = 1e-2
TOL_MLE_LOGLIK = 1e-4


def classify(path):
    """Return (kind, tol) for a JSON path (list of keys)."""
    in_mle = "mle" in path
    # phi/theta/sigma2 are model definitions except inside an "mle" block.
    if not in_mle and any(k in EXACT_KEYS for k in path):
        return "exact", 0.0
    if in_mle:
        if "loglik" in path[-1]:
            return "mle-loglik", TOL_MLE_LOGLIK
        return "mle-estimate", TOL_MLE_EST
    return "fixed", TOL_FIXED


def leaves(obj, path=()):
    """Yield (path, value); lists of scalars are one leaf."""
    if isinstance(obj, dict):
        for k in sorted(obj):
            yield from leaves(obj[k], path + (k,))
    elif isinstance(obj, list) and any(isinstance(x, (dict, list)) for x in obj):
        for i, x in enumerate(obj):
            yield from leaves(x, path + (str(i),))
    else:
        yield path, obj


def compare_scalar(a, b, kind, tol):
    """Return an error measure (0 = equal) or None if incomparable."""
    if a is None or b is None:
        return 0.0 if a is None and b is None else math.inf
    if isinstance(a, bool) or isinstance(b, bool) or isinstance(a, str) or isinstance(b, str):
        return 0.0 if a == b else math.inf
    if kind == "exact":
        return 0.0 if a == b else math.inf
    scale = max(abs(a), 1.0)
    return abs(a - b) / scale


def compare(committed, fresh, kind, tol):
    """Return (ok, worst_error, detail)."""
    if isinstance(committed, list) or isinstance(fresh, list):
        if not (isinstance(committed, list) and isinstance(fresh, list)):
            return False, math.inf, "type differs"
        if len(committed) != len(fresh):
            return False, math.inf, f"length {len(committed)} vs {len(fresh)}"
        worst, where = 0.0, -1
        for i, (a, b) in enumerate(zip(committed, fresh)):
            e = compare_scalar(a, b, kind, tol)
            if e > worst:
                worst, where = e, i
        ok = worst <= tol
        detail = f"n={len(committed)}"
        if worst > 0:
            detail += f" worst at [{where}]: {committed[where]!r} vs {fresh[where]!r}"
        return ok, worst, detail
    e = compare_scalar(committed, fresh, kind, tol)
    detail = f"{committed!r}"
    if e > 0:
        detail += f" vs {fresh!r}"
    return e <= tol, e, detail


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", default=HERE, help="folder of the committed JSON files")
    args = ap.parse_args(argv)

    passed = failed = 0
    with tempfile.TemporaryDirectory(prefix="tagwright-ref-") as tmp:
        gen = subprocess.run([sys.executable, os.path.join(HERE, "make_reference.py"),
                              "--out", tmp], capture_output=True, text=True)
        if gen.returncode != 0:
            sys.stdout.write(gen.stdout)
            sys.stderr.write(gen.stderr)
            print("FAIL make_reference.py exited with status", gen.returncode)
            print(f"{passed} passed, {failed + 1} failed")
            return 1

        for fname in FILES:
            cpath = os.path.join(args.dir, fname)
            fpath = os.path.join(tmp, fname)
            if not os.path.exists(cpath):
                print(f"FAIL {fname}: committed file missing ({cpath})")
                failed += 1
                continue
            if not os.path.exists(fpath):
                print(f"FAIL {fname}: not regenerated by make_reference.py")
                failed += 1
                continue
            with open(cpath, encoding="utf-8") as f:
                committed = json.load(f)
            with open(fpath, encoding="utf-8") as f:
                fresh = json.load(f)

            cl = dict(leaves(committed))
            fl = dict(leaves(fresh))
            for path in sorted(set(cl) | set(fl)):
                name = f"{fname}:{'.'.join(path)}"
                if path not in cl or path not in fl:
                    side = "committed" if path not in cl else "regenerated"
                    print(f"FAIL {name}: missing in {side} file")
                    failed += 1
                    continue
                a, b = cl[path], fl[path]
                if path[-1] in INFO_STRING_KEYS and isinstance(a, str):
                    if a != b:
                        print(f"NOTE {name}: text differs (not a failure)")
                    continue
                kind, tol = classify(path)
                ok, err, detail = compare(a, b, kind, tol)
                status = "ok  " if ok else "FAIL"
                print(f"{status} {name} [{kind}, tol {tol:g}] err {err:.3g} {detail}")
                if ok:
                    passed += 1
                else:
                    failed += 1

    print(f"{passed} passed, {failed} failed")
    return 0 if failed == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
