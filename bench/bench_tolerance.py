"""Benchmark of the fabrication-tolerance Monte Carlo (metalay.studies.study.tolerance_study) on a ~1e5-site design.

Design: charge-3 vortex plus a 4 degree tilt at 532 nm, 250 x 85 nm fins on a 325 nm square lattice in a
116 um circular aperture (~1.0e5 sites), compiled once.  Library: an invented closed-form test library (stated in
``_library``; written to a temporary folder, never shipped) with three fin sizes on one bias line, so CD bias is
evaluated as well.  Errors per sample: CD bias N(0, 3 nm) per edge, rotation N(0, 2 deg), 0.1 % missing elements.

ours      tolerance_study: decode the mask once, then per sample perturb the element arrays and run the optical
          evaluation (site fields, near field, FFT far field, spots, OAM spectrum); threads over samples.
serial    the same with one worker (same numbers: results do not depend on the worker count).
baseline  metalay.checks.optics.check_optics of the mask (read + decode + the same figures, no plots) once, times the
          number of samples: what re-checking a re-written mask per sample would cost at least (the GDS writes
          themselves not counted).

    .venv/bin/python bench/bench_tolerance.py                    # 200 samples, 1e5 sites
    .venv/bin/python bench/bench_tolerance.py --samples 50       # quick run
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def _library(folder: Path):
    from metalay.cells.library import CellLibrary, CellSpec, save_library

    lam = 532.0
    sizes = [(250, 85), (240, 75), (260, 95)]
    cells = tuple(CellSpec(id=f"fin-{a}x{b}", kind="nanofin", layer="fins",
                           dims_nm=(("length_nm", float(a)), ("width_nm", float(b)))) for a, b in sizes)
    wls = np.linspace(0.9 * lam, 1.1 * lam, 5)
    dw = np.array([b - 85.0 for _, b in sizes])[:, None]
    tl = np.full((3, 5), 0.95, complex)
    ts = -0.95 * np.exp(1j * (0.01 * dw + 2.0 * (wls[None, :] - lam) / lam))  # invented closed form
    lib = CellLibrary(name="bench-fins", description="invented closed-form benchmark library", mode="transmission",
                      phase_mechanism="geometric", design_wavelength_nm=lam, period_nm=325.0, lattice="square",
                      incident_medium="air", exit_medium="air",
                      layers=({"name": "fins", "material": "test", "thickness_nm": 600.0, "patterned": True},),
                      rules={"min_feature_nm": 60.0, "min_gap_nm": 40.0, "max_aspect_ratio": 10.0, "grid_nm": 1.0,
                             "source": "Common practice (no source)"},
                      provenance={"geometry_source": "invented", "responses_source": "closed form (benchmark)",
                                  "solver": None, "materials": None, "notes": "benchmark only"},
                      cells=cells, wavelengths_nm=wls, t_long=tl, t_short=ts, power_long=np.abs(tl) ** 2,
                      power_short=np.abs(ts) ** 2)
    return save_library(lib, folder)[0]


def main() -> int:
    from metalay.api import compile_design
    from metalay.cells.library import load_library
    from metalay.checks import optics
    from metalay.design.spec import parse_design
    from metalay.studies import study

    ap = argparse.ArgumentParser()
    ap.add_argument("--samples", type=int, default=200)
    ap.add_argument("--diameter-um", type=float, default=116.0)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        lib_path = _library(tmp / "lib")
        raw = {"design": {"name": "bench-tol", "wavelength_nm": 532.0, "input_spin": 1, "library": str(lib_path)},
               "phase": [{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}],
               "aperture": {"shape": "circle", "diameter_um": args.diameter_um},
               "lattice": {"kind": "square", "period_nm": 325.0}, "mask": {"formats": ["gds"]},
               "checks": {"rules": False, "optics": False}}
        design = parse_design(raw)
        t0 = time.perf_counter()
        res = compile_design(design, tmp / "mask", show_progress=False)
        t_compile = time.perf_counter() - t0
        mask = res.files["gds"]
        sites = res.manifest["counts"]["sites"]
        t0 = time.perf_counter()
        optics.check_optics(mask, load_library(lib_path), design=design,
                            options=optics.OpticsOptions(max_side=1024, pad_factor=2.0, make_plots=False))
        t_check = time.perf_counter() - t0
        st = study.ToleranceSettings(samples=args.samples, cd_bias_sd_nm=3.0, rotation_sd_deg=2.0,
                                     missing_fraction=0.001, seed=1)
        t0 = time.perf_counter()
        par = study.tolerance_study(design, tmp / "tol", settings=st, mask=mask, workers=args.workers,
                                    show_progress=False)
        t_par = time.perf_counter() - t0
        n_serial = max(10, args.samples // 4)
        st_s = study.ToleranceSettings(samples=n_serial, cd_bias_sd_nm=3.0, rotation_sd_deg=2.0,
                                       missing_fraction=0.001, seed=1)
        t0 = time.perf_counter()
        ser = study.tolerance_study(design, settings=st_s, mask=mask, workers=1, show_progress=False)
        t_ser = (time.perf_counter() - t0) * args.samples / n_serial
        same = ser.samples == par.samples[:n_serial]
    base = t_check * args.samples
    print(f"design: {sites:,} sites (compile {t_compile:.2f} s); {args.samples} samples; "
          f"CD bias N(0, 3 nm), rotation N(0, 2 deg), 0.1 % missing")
    print(f"ours     ({args.workers} workers): {t_par:8.2f} s  ({t_par / args.samples * 1e3:.1f} ms/sample)")
    print(f"serial   (1 worker, {n_serial} samples scaled): {t_ser:8.2f} s  -> parallel speed-up {t_ser / t_par:.2f}x")
    print(f"baseline (check_optics per sample, no GDS writes): {base:8.2f} s  -> ours is {base / t_par:.1f}x faster")
    print(f"first {n_serial} samples identical with 1 and {args.workers} workers: {same}")
    s = par.statistics
    for k in ("designed_spot_efficiency", "purity"):
        print(f"{k}: nominal {par.nominal[k]:.5f}, median {s[k]['median']:.5f} [{s[k]['p5']:.5f}, {s[k]['p95']:.5f}]")
    print("target: 200 samples of a 1e5-site design in under 120 s:", "met" if t_par * 200 / args.samples < 120
          else "NOT met")
    return 0


if __name__ == "__main__":
    sys.exit(main())
