"""Benchmark: compile a ~1e7-site design (vortex + lens, 1.15 mm aperture, 325 nm period) to flat GDSII and OASIS.

Prints, from one run: metalay's compile time and peak memory; a plain baseline (a per-site Python loop building one
rotated gdstk polygon per site and writing the GDSII); the time to write the same number of bytes with a plain
buffered write + fsync (the physical floor); and the ratios. Each measurement runs in its own process so that peak
memories (ru_maxrss) are separate.

Run:  .venv/bin/python bench/bench_compile.py [--diameter-um 1150] [--skip-baseline]
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

DESIGN = """
[design]
name = "bench-1e7"
wavelength_nm = 532.0
input_spin = 1
library = "tio2-nanofin-532"

[[phase]]
kind = "vortex"
charge = 3

[[phase]]
kind = "lens"
focal_length_um = 5000.0

[aperture]
shape = "circle"
diameter_um = {diameter}

[lattice]
kind = "square"
period_nm = 325.0

[mask]
formats = {formats}
label = true

[checks]
rules = false
optics = false
"""


def _child(mode: str, folder: str, diameter: float, formats: str) -> None:
    t0 = time.perf_counter()
    out = {}
    if mode == "metalay":
        from metalay.api import compile_design
        from metalay.design.spec import load_design

        path = Path(folder) / "bench.toml"
        path.write_text(DESIGN.format(diameter=diameter, formats=formats))
        res = compile_design(load_design(path), Path(folder) / "metalay", show_progress=False)
        out["sites"] = res.manifest["counts"]["sites"]
        out["files"] = {k: v["bytes"] for k, v in res.manifest["files"].items()}
        out["stages"] = {k: round(v, 2) for k, v in res.timings_s.items()}
    elif mode == "baseline":
        import gdstk

        from metalay.design.lattice import Aperture, Lattice, sample_sites
        from metalay.design.phase import Lens, Vortex, target_phase
        from metalay.mask.mapping import geometric_rotation

        sites = sample_sites(Aperture("circle", diameter_um=diameter), Lattice("square", 325.0))
        phi = target_phase((Vortex(3), Lens(5000.0)), sites.x_um, sites.y_um, wavelength_nm=532.0)
        theta = geometric_rotation(phi, 1)
        lib = gdstk.Library(unit=1e-6, precision=1e-9)
        cell = lib.new_cell("BASE")
        xs, ys, ts = sites.x_um.tolist(), sites.y_um.tolist(), theta.tolist()
        for x, y, t in zip(xs, ys, ts):  # the per-site loop this benchmark measures
            p = gdstk.rectangle((-0.125, -0.0425), (0.125, 0.0425))
            p.rotate(t)
            p.translate(x, y)
            cell.add(p)
        lib.write_gds(str(Path(folder) / "baseline.gds"))
        out["sites"] = len(sites)
        out["files"] = {"gds": (Path(folder) / "baseline.gds").stat().st_size}
    elif mode == "rawwrite":
        nbytes = int(formats)
        block = os.urandom(8 << 20)
        with open(Path(folder) / "raw.bin", "wb") as fh:
            left = nbytes
            while left > 0:
                fh.write(block[: min(left, len(block))])
                left -= len(block)
            fh.flush()
            os.fsync(fh.fileno())
    out["seconds"] = time.perf_counter() - t0
    out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps(out))


def _run(mode, folder, diameter, formats):
    proc = subprocess.run([sys.executable, __file__, "--child", mode, "--folder", folder, "--diameter-um",
                           str(diameter), "--formats", formats], capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--diameter-um", type=float, default=1150.0)
    ap.add_argument("--skip-baseline", action="store_true")
    ap.add_argument("--child")
    ap.add_argument("--folder")
    ap.add_argument("--formats", default='["gds", "oas"]')
    a = ap.parse_args()
    if a.child:
        _child(a.child, a.folder, a.diameter_um, a.formats)
        return
    with tempfile.TemporaryDirectory(dir=Path(__file__).resolve().parent.parent / "out") as folder:
        gds_only = _run("metalay", folder, a.diameter_um, '["gds"]')
        both = _run("metalay", folder, a.diameter_um, '["gds", "oas"]')
        gds_bytes = both["files"]["gds"]
        raw = _run("rawwrite", folder, a.diameter_um, str(gds_bytes))
        base = None if a.skip_baseline else _run("baseline", folder, a.diameter_um, "")
    n = both["sites"]
    print(f"sites: {n:,}")
    print(f"metalay flat GDSII only : {gds_only['seconds']:7.2f} s  peak {gds_only['peak_mb']:7.0f} MB  "
          f"stages {gds_only['stages']}")
    print(f"metalay GDSII + OASIS   : {both['seconds']:7.2f} s  peak {both['peak_mb']:7.0f} MB  "
          f"stages {both['stages']}")
    print(f"raw write+fsync {gds_bytes / 1e6:.0f} MB : {raw['seconds']:7.2f} s")
    if base:
        print(f"baseline per-site gdstk : {base['seconds']:7.2f} s  peak {base['peak_mb']:7.0f} MB")
        print(f"speed-up vs baseline (GDSII only) : {base['seconds'] / gds_only['seconds']:.1f}x  (goal >= 6x)")
        print(f"speed-up vs baseline (GDSII+OASIS): {base['seconds'] / both['seconds']:.1f}x")
    print(f"GDSII time / raw write time       : {gds_only['seconds'] / raw['seconds']:.2f}  (goal <= 3)")
    print(f"peak memory GDSII+OASIS           : {both['peak_mb']:.0f} MB  (goal <= 1500 MB)")
    print(f"GDSII / OASIS size                : {gds_bytes / both['files']['oas']:.1f}x  (goal >= 20x)")


if __name__ == "__main__":
    main()
