"""The design-rule check on the shapes that used to make it quadratic: many-vertex polygons and stacked shapes.

Each case runs in its own process (peak resident memory separate). The baseline is the former way, measured in the
same run: every (edge, vertex) pair of a polygon (a loop over vertex pairs for convex polygons, all n^2 pairs through
shapely for the others), at 1024 and 2048 vertices (8190 vertices took 3.7 GB and did not finish that way):

    .venv/bin/python bench/bench_rules_limits.py
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

_CHILD = r"""
import json, math, resource, sys, time
import numpy as np
import shapely
import metalay.checks.rules as R
from metalay.checks.rules import LayerRules, RuleSet, check_mask
from metalay.io.gdsread import FlatPolygons

case, n, old = sys.argv[1], int(sys.argv[2]), sys.argv[3] == "old"
t = 2 * np.pi * np.arange(n) / n
if case == "circle":      # snapped circle: not strictly convex, so the general (shapely) path
    ring = np.rint(np.stack([5e5 * np.cos(t), 5e5 * np.sin(t)], 1)).astype(np.int64)
    polys = [ring]
elif case == "convex":    # its hull: strictly convex, the vectorised path
    pts = np.rint(np.stack([5e5 * np.cos(t), 5e5 * np.sin(t)], 1))
    polys = [np.asarray(shapely.convex_hull(shapely.multipoints(pts)).exterior.coords)[:-1].astype(np.int64)]
elif case == "star":      # non-convex
    r = np.where(np.arange(n) % 2, 4e5, 3e5)
    polys = [np.rint(np.stack([r * np.cos(t), r * np.sin(t)], 1)).astype(np.int64)]
elif case == "stack":     # n identical boxes on one spot
    polys = [np.array([[0, 0], [1000, 0], [1000, 1000], [0, 1000]])] * n
elif case == "overlap":   # n boxes 1 nm apart in a square array
    k = int(math.isqrt(n))
    i, j = np.meshgrid(np.arange(k), np.arange(k), indexing="ij")
    off = np.stack([i.ravel(), j.ravel()], 1)
    polys = list(np.array([[0, 0], [1000, 0], [1000, 1000], [0, 1000]])[None] + off[:, None, :])
flat = FlatPolygons.from_arrays(1, 0, [len(p) for p in polys], np.concatenate(polys))
rules = RuleSet("b", (LayerRules(1, 0, min_width_nm=20.0, min_spacing_nm=20.0, forbid_overlap=True,
                                 min_notch_nm=20.0, check_validity=True, min_angle_deg=10.0),))
if old:  # the former way: all vertex pairs
    R._WIDE_VERTICES = 1 << 30
    R._INDEXED_PAIRS_VERTICES = 1 << 30
t0 = time.perf_counter()
rep = check_mask(flat, rules)
print(json.dumps({"seconds": time.perf_counter() - t0, "vertices": int(flat.xy_db.shape[0]),
                  "violations": rep.total_violations,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def run(case: str, n: int, old: bool = False) -> dict:
    proc = subprocess.run([sys.executable, "-c", _CHILD, case, str(n), "old" if old else "new"],
                          capture_output=True, text=True, cwd=ROOT, timeout=3600)
    if proc.returncode:
        raise SystemExit(proc.stderr[-2000:])
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> int:
    print(f"{'case':8s} {'vertices':>9s} {'way':>8s} {'s':>8s} {'peak MB':>8s}")
    for case in ("circle", "convex", "star"):
        for n in (1024, 2048):
            old, new = run(case, n, True), run(case, n)
            for label, r in (("all n^2", old), ("now", new)):
                print(f"{case:8s} {r['vertices']:9d} {label:>8s} {r['seconds']:8.3f} {r['peak_mb']:8.0f}")
            print(f"{'':8s} {'':9s} {'ratio':>8s} {old['seconds'] / new['seconds']:8.1f}x")
        r = run(case, 8190)
        print(f"{case:8s} {r['vertices']:9d} {'now':>8s} {r['seconds']:8.3f} {r['peak_mb']:8.0f}")
    for case in ("stack", "overlap"):
        r = run(case, 65536)
        print(f"{case:8s} {r['vertices']:9d} {'now':>8s} {r['seconds']:8.3f} {r['peak_mb']:8.0f}   "
              f"({r['violations']} violations listed; pairs capped)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
