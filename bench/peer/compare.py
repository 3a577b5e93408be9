#!/usr/bin/env python3
"""Compares a peer's figures with sluice's (or another peer's, or the planted truth).

    compare.py PEER.json WORK/candidates.json [--manifest STORE/manifest.json]
    compare.py PEER.json OTHER_PEER.json
    compare.py PEER.json demo-data/truth          # truth/summary.json and truth/critical.csv

From sluice's candidates file (crates/sluice-aggregate: tables of columns and rows) it takes
cohort_flow (step "5", outcome "remaining"), band_transitions (before_band x after_band),
worst_paired (subgroup "all", statistic "mean_difference", column estimate) and critical_results
(subgroup "all", window x context, n_events); rows_read comes from the store manifest's totals
when --manifest is given. Counts must be equal, means within 1e-9 relative. Prints one line per
figure and exits 1 on any mismatch.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import json
import math
import sys
from pathlib import Path

ALL = "all"


def table(cands: dict, name: str) -> list[dict]:
    for t in cands["tables"]:
        if t["name"] == name:
            cols = [c["name"] for c in t["columns"]]
            return [dict(zip(cols, r)) for r in t["rows"]]
    sys.exit(f"candidates file has no table {name!r}")


def from_candidates(path: Path, manifest: Path | None) -> dict:
    c = json.loads(path.read_text())
    flow = [r for r in table(c, "cohort_flow") if str(r["step"]) == "5" and r["outcome"] == "remaining"]
    out: dict = {"cohort": flow[0]["n_patients"] if flow else None}
    out["transitions"] = {f"{r['before_band']}->{r['after_band']}": r["n_patients"]
                          for r in table(c, "band_transitions")
                          if ALL not in (r["before_band"], r["after_band"]) and r["n_patients"]}
    out["worst_mean_difference"] = {r["analyte"]: r["estimate"] for r in table(c, "worst_paired")
                                    if r["subgroup"] == ALL and r["statistic"] == "mean_difference"
                                    and r["estimate"] is not None}
    crit: dict = {}
    for r in table(c, "critical_results"):
        if r.get("subgroup", ALL) == ALL and r["context"] in ("monitoring", "other"):
            crit.setdefault(r["window"], {})[r["context"]] = r["n_events"]
    out["critical"] = crit
    if manifest:
        out["rows_read"] = json.loads(manifest.read_text())["totals"]["rows"]
    return out


def add_months(d: dt.date, n: int) -> dt.date:
    import calendar
    y, m = divmod(d.year * 12 + d.month - 1 + n, 12)
    return dt.date(y, m + 1, min(d.day, calendar.monthrange(y, m + 1)[1]))


def from_truth(folder: Path) -> dict:
    """What the generator planted, in the peers' terms (schedules slower than three-monthly are
    the band "longer"; critical values of stable-cohort patients counted by window)."""
    s = json.loads((folder / "summary.json").read_text())
    band = {"monthly": "monthly", "two_monthly": "two_monthly", "three_monthly": "three_monthly"}
    trans: dict = {}
    for k, n in s["stable_transitions"].items():
        b, a = k.split("->")
        key = f"{band.get(b, 'longer')}->{band.get(a, 'longer')}"
        trans[key] = trans.get(key, 0) + n
    idx = dt.date.fromisoformat(s["config"]["policy_change"])
    wins = {"baseline": (add_months(idx, -12), idx), "follow_up": (idx, add_months(idx, 12))}
    with open(folder / "patients.csv", newline="") as f:
        stable = {r["nhs_number"] for r in csv.DictReader(f) if r["group"] == "mtx_stable"}
    crit = {w: {"monitoring": 0, "other": 0} for w in wins}
    with open(folder / "critical.csv", newline="") as f:
        for r in csv.DictReader(f):
            if r["nhs_number"] not in stable:
                continue
            d = dt.date.fromisoformat(r["collected_at"][:10])
            for w, (lo, hi) in wins.items():
                if lo <= d < hi:
                    crit[w]["monitoring" if r["monitoring"] == "true" else "other"] += 1
    return {"cohort": s["patients_by_group"]["mtx_stable"], "transitions": trans,
            "critical": crit, "rows_read": s["totals"]["rows"]}


def load_other(path: Path, manifest: Path | None) -> tuple[str, dict]:
    if path.is_dir() and (path / "summary.json").exists():
        return "truth", from_truth(path)
    if path.is_dir():
        path = path / "candidates.json"
    doc = json.loads(path.read_text())
    if "tables" in doc:
        return "sluice", from_candidates(path, manifest)
    return "other", doc


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("peer", type=Path, help="peer output JSON")
    ap.add_argument("other", type=Path, help="sluice candidates.json (or its work folder), another peer JSON, or a truth folder")
    ap.add_argument("--manifest", type=Path, help="store manifest.json, for rows_read")
    ap.add_argument("--rel", type=float, default=1e-9, help="relative tolerance for means")
    a = ap.parse_args()
    peer = json.loads(a.peer.read_text())
    label, other = load_other(a.other, a.manifest)

    lines: list[tuple[str, object, object, bool]] = []

    def count(name, x, y):
        lines.append((name, x, y, x == y))

    def mean(name, x, y):
        ok = (x is None and y is None) or (x is not None and y is not None
                                           and math.isclose(x, y, rel_tol=a.rel, abs_tol=1e-12))
        lines.append((name, x, y, ok))

    count("cohort", peer.get("cohort"), other.get("cohort"))
    if "transitions" in other:
        pt, ot = peer.get("transitions") or {}, other["transitions"] or {}
        for k in sorted(set(pt) | set(ot)):
            count(f"transition {k}", pt.get(k, 0), ot.get(k, 0))
    if "worst_mean_difference" in other:
        pw, ow = peer.get("worst_mean_difference") or {}, other["worst_mean_difference"] or {}
        for k in sorted(set(pw) | set(ow)):
            mean(f"worst mean difference {k}", pw.get(k), ow.get(k))
    if "critical" in other:
        for w in sorted(set(peer.get("critical", {})) | set(other["critical"])):
            for c in ("monitoring", "other"):
                count(f"critical {w} {c}", peer.get("critical", {}).get(w, {}).get(c, 0),
                      other["critical"].get(w, {}).get(c, 0))
    if "rows_read" in other:
        count("rows read", peer.get("rows_read"), other["rows_read"])

    width = max(len(n) for n, *_ in lines)
    print(f"{'figure':<{width}}  {'peer':>22}  {label:>22}  agree")
    for name, x, y, ok in lines:
        fx = f"{x:.12g}" if isinstance(x, float) else str(x)
        fy = f"{y:.12g}" if isinstance(y, float) else str(y)
        print(f"{name:<{width}}  {fx:>22}  {fy:>22}  {'yes' if ok else 'NO'}")
    bad = sum(not ok for *_, ok in lines)
    print(f"{len(lines) - bad} agree, {bad} differ")
    sys.exit(1 if bad else 0)


if __name__ == "__main__":
    main()
