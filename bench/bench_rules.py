"""Benchmark of the design-rule check on a ~1e7-fin mask against a plain shapely STRtree spacing check.

Mask: 250 x 85 nm fins rotated by a charge-3 vortex + tilt phase on a 325 nm square lattice inside a 1.15 mm
circular aperture, each fin its own 4-vertex BOUNDARY at integer nm (1 nm database unit), written flat with the
project's streaming GDSII writer (metalay.io.writer.GdsStream) - the same records metalay compile writes.

Each measurement runs in its own subprocess so the peak resident memory (ru_maxrss) is separate.

    .venv/bin/python bench/bench_rules.py                 # full size (1.15 mm aperture, ~9.8e6 fins)
    .venv/bin/python bench/bench_rules.py --diameter-um 200   # quick run (~3e5 fins)
    .venv/bin/python bench/bench_rules.py --diameter-um 365 --no-baseline   # ~1e6 fins, for profiling
    .venv/bin/python bench/bench_rules.py --threads 1        # spacing/geometry chunks on one thread
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def make_mask(path: str, diameter_um: float, pitch_nm: int = 325) -> dict:
    import numpy as np

    from metalay.io.writer import GdsStream

    t0 = time.perf_counter()
    n = int(np.ceil(diameter_um * 1000 / 2 / pitch_nm))
    base = np.array([(-125.0, -42.5), (125.0, -42.5), (125.0, 42.5), (-125.0, 42.5)])
    count = 0
    with GdsStream(path, "BENCH", db_unit_nm=1.0) as gs:
        for row in range(-n, n + 1):  # one lattice row per chunk (~3500 fins)
            x = np.arange(-n, n + 1) * pitch_nm
            y = np.full_like(x, row * pitch_nm)
            ok = np.hypot(x, y) <= diameter_um * 500 - pitch_nm
            x, y = x[ok], y[ok]
            if x.size == 0:
                continue
            phi = 3 * np.arctan2(y, x) + 2 * np.pi * x / 8000.0
            th = phi / 2
            c, s = np.cos(th)[:, None], np.sin(th)[:, None]
            off = np.rint(np.stack([c * base[:, 0] - s * base[:, 1], s * base[:, 0] + c * base[:, 1]], -1))
            gs.boundaries(1, 0, off.astype(np.int64) + np.stack([x, y], -1)[:, None, :])
            count += x.size
    # make the file durable before the timed runs, so that no run pays for its write-back
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())
    return {"fins": count, "write_s": time.perf_counter() - t0, "file_mb": Path(path).stat().st_size / 1e6,
            "peak_mb": peak_mb()}


def run_ours(path: str, spacing_nm: float) -> dict:
    from metalay.checks.rules import LayerRules, RuleSet, check_mask

    rules = RuleSet("bench", (LayerRules(1, 0, min_width_nm=80.0, min_spacing_nm=spacing_nm, forbid_overlap=True,
                                         min_area_nm2=15000.0, grid_nm=1.0, no_field_straddle=True),),
                    write_field_um=100.0)
    t0 = time.perf_counter()
    rep = check_mask(path, rules)
    total = time.perf_counter() - t0
    return {"total_s": total, "timings_s": dict(rep.timings_s), "peak_mb": peak_mb(),
            "counts": {r.rule: r.count for r in rep.results},
            "spacing_method": [r.method for r in rep.results if r.rule == "spacing"][0],
            "worst_spacing_nm": [r.worst_value for r in rep.results if r.rule == "spacing"][0]}


def run_baseline(path: str, spacing_nm: float) -> dict:
    """Straightforward shapely: one polygon per element, an STRtree, dwithin query, exact distances."""
    import numpy as np
    import shapely

    from metalay.io.gdsread import read_mask

    t0 = time.perf_counter()
    fp = read_mask(path, layers=[(1, 0)])
    t_read = time.perf_counter() - t0
    t1 = time.perf_counter()
    polys = shapely.polygons(fp.xy_db.reshape(fp.count, 4, 2).astype(np.float64))
    t_build = time.perf_counter() - t1
    t2 = time.perf_counter()
    tree = shapely.STRtree(polys)
    q = tree.query(polys, predicate="dwithin", distance=spacing_nm)
    q = q[:, q[0] < q[1]]
    d = shapely.distance(polys[q[0]], polys[q[1]])
    n_bad = int(((d > 0) & (d < spacing_nm)).sum())
    t_query = time.perf_counter() - t2
    return {"total_s": time.perf_counter() - t0, "read_s": t_read, "build_polygons_s": t_build,
            "tree_query_distance_s": t_query, "spacing_violations": n_bad, "peak_mb": peak_mb()}


def run_warm(path: str) -> dict:
    """Untimed read in its own process before each timed run, so that every timed run starts from the same
    state (the first process to map a freshly written file was measured up to ~2 s slower on this machine)."""
    from metalay.io.gdsread import read_mask

    return {"polygons": read_mask(path, layers=[(1, 0)]).count}


def child(args) -> None:
    fn = {"make": lambda: make_mask(args.path, args.diameter_um), "ours": lambda: run_ours(args.path, args.spacing_nm),
          "warm": lambda: run_warm(args.path),
          "baseline": lambda: run_baseline(args.path, args.spacing_nm)}[args.child]
    print(json.dumps(fn()))


def spawn(kind: str, path: str, args) -> dict:
    cmd = [sys.executable, __file__, "--child", kind, "--path", path, "--diameter-um", str(args.diameter_um),
           "--spacing-nm", str(args.spacing_nm)]
    env = dict(os.environ, METALAY_THREADS=str(args.threads))
    out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--diameter-um", type=float, default=1150.0)
    ap.add_argument("--spacing-nm", type=float, default=70.0,
                    help="min spacing (70 nm: every neighbour pair survives the circumradius prefilter)")
    ap.add_argument("--no-baseline", action="store_true")
    ap.add_argument("--threads", type=int, default=2, help="worker threads for our check (METALAY_THREADS)")
    ap.add_argument("--child", choices=("make", "warm", "ours", "baseline"))
    ap.add_argument("--path")
    args = ap.parse_args()
    if args.child:
        child(args)
        return
    with tempfile.TemporaryDirectory(dir=ROOT / "out" if (ROOT / "out").exists() else None) as tmp:
        path = str(Path(tmp) / "bench.gds")
        made = spawn("make", path, args)
        print(f"mask: {made['fins']} fins, {made['file_mb']:.0f} MB, written in {made['write_s']:.1f} s")
        spawn("warm", path, args)
        ours = spawn("ours", path, args)
        print(f"metalay rules check (width, spacing+overlap, area, grid, write field): {ours['total_s']:.1f} s, "
              f"peak {ours['peak_mb']:.0f} MB, spacing via {ours['spacing_method']}, {args.threads} thread(s)")
        for k, v in ours["timings_s"].items():
            print(f"    {k:<24} {v:7.2f} s")
        print(f"    counts: {ours['counts']}, worst spacing {ours['worst_spacing_nm']} nm")
        if not args.no_baseline:
            spawn("warm", path, args)
            base = spawn("baseline", path, args)
            print(f"baseline shapely STRtree spacing only: {base['total_s']:.1f} s (read {base['read_s']:.1f}, "
                  f"polygons {base['build_polygons_s']:.1f}, tree+query+distance {base['tree_query_distance_s']:.1f}),"
                  f" peak {base['peak_mb']:.0f} MB, {base['spacing_violations']} spacing violations")
            print(f"speed-up (baseline / ours): {base['total_s'] / ours['total_s']:.1f}x; "
                  f"memory ratio {base['peak_mb'] / ours['peak_mb']:.1f}x")
            ok = base["spacing_violations"] == ours["counts"]["spacing"]
            print(f"spacing violation counts agree: {ok}")


if __name__ == "__main__":
    main()
