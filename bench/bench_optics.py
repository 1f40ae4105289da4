"""Benchmark of the optical check on a ~1e7-fin mask against a gdstk read with a per-polygon Python loop.

Mask: the bundled tio2-nanofin-532 fins (270 x 70 nm) on a 325 nm square lattice inside a 1.15 mm circular
aperture, rotated by theta = phi / 2 for a charge-3 vortex plus a 4 degree tilt at 532 nm (input spin +1), each fin
its own 4-vertex BOUNDARY at integer nm (1 nm database unit), vertices snapped half-to-even about integer centres,
written flat with the project's streaming GDSII writer (metalay.io.writer.GdsStream, the records metalay compile
writes).

ours      metalay.checks.optics.check_optics: vectorised read (gdsread) + decode + near field at full site resolution +
          far field (FFT, pad 2) + OAM spectrum at full resolution + spots, fringe reading, figures and report.
baseline  gdstk.read_gds, then a Python loop over polygons computing each fin's centre and rotation from
          .points (the read and decode step only).

Each measurement runs in its own subprocess so that its peak resident memory (ru_maxrss) is its own.

    .venv/bin/python bench/bench_optics.py                      # full size (1.15 mm aperture, ~9.8e6 fins)
    .venv/bin/python bench/bench_optics.py --diameter-um 200    # quick run (~3e5 fins)
"""

from __future__ import annotations

import argparse
import json
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


def design_for(diameter_um: float):
    from metalay.design.spec import parse_design

    return parse_design({
        "design": {"name": "bench-optics", "wavelength_nm": 532.0, "input_spin": 1, "library": "tio2-nanofin-532"},
        "phase": [{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}],
        "aperture": {"shape": "circle", "diameter_um": diameter_um},
        "lattice": {"kind": "square", "period_nm": 325.0}})


def make_mask(path: str, diameter_um: float) -> dict:
    import numpy as np

    from metalay.design.lattice import row_range, sample_sites
    from metalay.design.phase import target_phase
    from metalay.io.writer import GdsStream

    t0 = time.perf_counter()
    design = design_for(diameter_um)
    from metalay.cells.library import load_library

    cell = load_library("tio2-nanofin-532").cells[0]  # the bundled library's fin (so decoding matches it)
    hl, hw = cell.dim("length_nm") / 2, cell.dim("width_nm") / 2
    base = np.array([(-hl, -hw), (hl, -hw), (hl, hw), (-hl, hw)])
    j0, j1 = row_range(design.aperture, design.lattice)
    count = 0
    with GdsStream(path, "BENCH", db_unit_nm=1.0) as gs:
        for a in range(j0, j1, 64):  # bands of 64 lattice rows (~2e5 fins per band)
            s = sample_sites(design.aperture, design.lattice, rows=(a, min(a + 64, j1)))
            if len(s) == 0:
                continue
            phi = target_phase(design.terms, s.x_um, s.y_um, wavelength_nm=532.0, sigma=1)
            th = np.mod(phi / 2, np.pi)
            c, sn = np.cos(th)[:, None], np.sin(th)[:, None]
            off = np.rint(np.stack([c * base[:, 0] - sn * base[:, 1], sn * base[:, 0] + c * base[:, 1]], -1))
            centre = np.stack([np.rint(s.x_um * 1000), np.rint(s.y_um * 1000)], -1)[:, None, :]
            gs.boundaries(1, 0, (off + centre).astype(np.int64))
            count += len(s)
    return {"fins": count, "write_s": time.perf_counter() - t0, "file_mb": Path(path).stat().st_size / 1e6,
            "peak_mb": peak_mb()}


def run_ours(path: str, diameter_um: float, out_dir: str) -> dict:
    from metalay.checks import optics

    t0 = time.perf_counter()
    res = optics.check_optics(path, "tio2-nanofin-532", design=design_for(diameter_um), out_dir=out_dir,
                              options=optics.OpticsOptions(pad_factor=2.0, max_side=4096))
    total = time.perf_counter() - t0
    f = res.figures
    return {"total_s": total, "timings": res.timings, "peak_mb": peak_mb(), "sites": f["decode"]["sites"],
            "grid": f["grid"], "oam_purity_l3": f["oam"]["purity"], "fringe_charge": f["fringe_reading"]["charge"],
            "designed_spot_efficiency": f["designed_spot_efficiency"],
            "deflection_deg": f["designed_spot_position"]["deflection_deg"],
            "phase_error_deg": f.get("phase_error_deg"), "max_size_error_nm": f["decode"]["max_size_error_nm"],
            "notes": list(res.notes)}


def run_baseline(path: str) -> dict:
    import math

    import gdstk
    import numpy as np

    t0 = time.perf_counter()
    lib = gdstk.read_gds(path)
    t_read = time.perf_counter() - t0
    rot = []
    cx = []
    cy = []
    for cell in lib.cells:
        for poly in cell.polygons:  # the per-polygon Python loop being measured
            pts = poly.points
            c = pts.mean(axis=0)
            e0 = pts[1] - pts[0]
            e1 = pts[2] - pts[1]
            e = e0 if math.hypot(*e0) >= math.hypot(*e1) else e1
            rot.append(math.atan2(e[1], e[0]) % math.pi)
            cx.append(c[0])
            cy.append(c[1])
    rot = np.array(rot)
    return {"total_s": time.perf_counter() - t0, "read_s": t_read, "polygons": int(rot.size), "peak_mb": peak_mb()}


def child(args) -> None:
    if args.child == "make":
        out = make_mask(args.path, args.diameter_um)
    elif args.child == "ours":
        out = run_ours(args.path, args.diameter_um, args.out_dir)
    else:
        out = run_baseline(args.path)
    print(json.dumps(out))


def spawn(kind: str, args, path: str, out_dir: str) -> dict:
    cmd = [sys.executable, __file__, "--child", kind, "--path", path, "--diameter-um", str(args.diameter_um),
           "--out-dir", out_dir]
    res = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if res.returncode != 0:
        raise SystemExit(f"{kind} failed:\n{res.stderr}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--diameter-um", type=float, default=1150.0)
    ap.add_argument("--child", choices=("make", "ours", "baseline"))
    ap.add_argument("--path")
    ap.add_argument("--out-dir", default="")
    ap.add_argument("--skip-baseline", action="store_true")
    args = ap.parse_args()
    if args.child:
        child(args)
        return
    with tempfile.TemporaryDirectory(dir=ROOT / "out" if (ROOT / "out").is_dir() else None) as tmp:
        path = str(Path(tmp) / "bench_optics.gds")
        made = spawn("make", args, path, tmp)
        print(f"mask: {made['fins']:,} fins, {made['file_mb']:.0f} MB GDSII, written in {made['write_s']:.1f} s "
              f"(peak {made['peak_mb']:.0f} MB)")
        # untimed warm-up read in its own process: the first process to map a freshly written file pays the page
        # faults (up to ~2 s here); after this both timed runs start from the same page-cache state
        with open(path, "rb") as fh:
            while fh.read(64 << 20):
                pass
        ours = spawn("ours", args, path, str(Path(tmp) / "report"))
        t = ours["timings"]
        print(f"ours: total {ours['total_s']:.2f} s, peak {ours['peak_mb']:.0f} MB, {ours['sites']:,} sites, "
              f"grid {ours['grid']['nx']} x {ours['grid']['ny']} (decimation {ours['grid']['decimation']}), "
              f"FFT {ours['grid']['fft_side'][0]} x {ours['grid']['fft_side'][1]}")
        print("  split: " + ", ".join(f"{k[:-2]} {v:.2f} s" for k, v in t.items()))
        print(f"  OAM purity (l=3) {ours['oam_purity_l3']:.5f}, fringe charge {ours['fringe_charge']}, designed spot "
              f"{ours['designed_spot_efficiency']:.4f} at {ours['deflection_deg']:.4f} deg, phase error "
              f"{ours['phase_error_deg']}, max size error {ours['max_size_error_nm']:.2f} nm")
        if args.skip_baseline:
            return
        base = spawn("baseline", args, path, tmp)
        print(f"baseline (gdstk read + per-polygon loop): total {base['total_s']:.2f} s (read {base['read_s']:.2f} s), "
              f"peak {base['peak_mb']:.0f} MB, {base['polygons']:,} polygons")
        ours_rd = t["read_s"] + t["decode_s"]
        print(f"ratio read+decode: baseline / ours = {base['total_s'] / ours_rd:.1f}x "
              f"({base['total_s']:.2f} s vs {ours_rd:.2f} s)")
        print(f"ratio whole check (ours incl. FFT, OAM, plots, report) vs baseline read + loop: "
              f"{base['total_s'] / ours['total_s']:.2f}x")
        print(f"peak memory: ours {ours['peak_mb']:.0f} MB (limit 4096), baseline {base['peak_mb']:.0f} MB")


if __name__ == "__main__":
    main()
