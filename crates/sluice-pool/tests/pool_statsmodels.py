#!/usr/bin/env python3
"""Recomputes a pooled release's fixed and random-effects estimates with statsmodels.

Usage: pool_statsmodels.py POOLED_RELEASE_DIR

Reads site_estimates.parquet and pooled_estimates.parquet (pyarrow), groups the site rows by the
pooled row's dimensions, runs statsmodels.stats.meta_analysis.combine_effects (DerSimonian-Laird
method "dl") on estimate and se**2, and compares fixed/random estimates, their SEs and intervals,
Q, tau2 and I2 (a proportion in both) with pooled_estimates. Exits non-zero on any mismatch.
"""
import json
import math
import sys

import numpy as np
import pyarrow.parquet as pq
from statsmodels.stats.meta_analysis import combine_effects

TOL = 1e-9


def table(path):
    pf = pq.ParquetFile(path)
    meta = {k.decode(): v.decode() for k, v in pf.metadata.metadata.items()}
    cols = json.loads(meta["sluice.columns"])
    dims = [c["name"] for c in cols if c["role"] == "dimension"]
    return pf.read().to_pylist(), dims


def main(rel):
    sites, sdims = table(f"{rel}/site_estimates.parquet")
    pooled, pdims = table(f"{rel}/pooled_estimates.parquet")
    groups = {}
    for r in sites:
        if r["disclosure"].startswith("withheld") or r["estimate"] is None:
            continue
        # A site without a positive finite standard error has no inverse-variance weight.
        if r["se"] is None or not (r["se"] > 0 and math.isfinite(r["se"])):
            continue
        groups.setdefault(tuple(r[d] for d in pdims), []).append(r)
    bad = 0
    checked = 0
    for p in pooled:
        if p["disclosure"].startswith("withheld") or p["fixed_estimate"] is None:
            continue
        rows = groups.get(tuple(p[d] for d in pdims), [])
        if len(rows) != int(p["n_sites"]):
            print(f"MISMATCH {[p[d] for d in pdims]}: {len(rows)} site rows, n_sites {p['n_sites']}")
            bad += 1
            continue
        y = np.array([r["estimate"] for r in rows])
        v = np.array([r["se"] ** 2 for r in rows])
        res = combine_effects(y, v, method_re="dl")
        f = res.summary_frame(alpha=0.05)
        want = {
            "fixed_estimate": f.loc["fixed effect", "eff"],
            "fixed_se": f.loc["fixed effect", "sd_eff"],
            "fixed_lower": f.loc["fixed effect", "ci_low"],
            "fixed_upper": f.loc["fixed effect", "ci_upp"],
            "random_estimate": f.loc["random effect", "eff"],
            "random_se": f.loc["random effect", "sd_eff"],
            "random_lower": f.loc["random effect", "ci_low"],
            "random_upper": f.loc["random effect", "ci_upp"],
            "q": res.q,
            # sluice truncates both at 0 (statsmodels' i2 = 1 - 1/H² can be negative).
            "tau2": max(0.0, res.tau2),
            "i2": max(0.0, res.i2) if np.isfinite(res.i2) else 0.0,
        }
        if not res.tau2 > 0:
            # statsmodels keeps a negative DerSimonian-Laird tau2; the method truncates it at 0,
            # where the random-effects estimate equals the fixed-effect one.
            for part in ("estimate", "se", "lower", "upper"):
                want[f"random_{part}"] = want[f"fixed_{part}"]
        for k, w in want.items():
            g = p[k]
            if g is None or not math.isclose(g, w, rel_tol=TOL, abs_tol=TOL):
                print(f"MISMATCH {[p[d] for d in pdims]} {k}: pooled {g} statsmodels {w}")
                bad += 1
        checked += 1
    print(f"{checked} pooled rows checked against statsmodels combine_effects, {bad} mismatches")
    return 1 if bad or not checked else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1]))
