"""Benchmark: whole compiles from 1e6 to 1e8 sites (1e9 optional): time, peak memory, file sizes, GDSII vs OASIS.

The design is the tests' small vortex (charge 3 + 4 degree tilt at 532 nm, titanium dioxide nanofins, square
lattice of 325 nm) with the circular aperture scaled to the number of sites asked for (an invented scenario for
benchmarking). Each case is one ``metalay.api.compile_design`` in its own process, so its peak resident memory
(``ru_maxrss``) is its own; with ``--workers`` the workers' peak is that of the largest worker process.

Cases per size:

* ``gds``          flat GDSII only, no checks (the baseline of the ratios);
* ``oas``          OASIS only, no checks (own streamed writer: repetitions, CBLOCKs);
* ``levels``       GDSII + OASIS with one master cell per rotation level (K = 16), no checks;
* ``gds+checks``   flat GDSII with the design-rule and optics checks (sizes up to ``--checks-up-to``);
* ``oas+checks``   OASIS with the checks (read from the OASIS file);
* ``oas workers``  OASIS on a local Dask cluster of ``--workers`` processes (when given).

Compiles whose checks stream run them side by side (the second check in a child process,
:mod:`metalay.mask.checkrun`); the note then gives the parent's and the child's peaks added (an upper bound of the
memory in use at any time), which is the figure to hold against a memory target.

A case the memory admission refuses is reported as refused, with the compile's own one-line reason. Printed: a
table, the ratios OASIS/GDSII (time, size) per size, and the exponent b of a least-squares fit time = a * sites^b
per case (linear scaling gives b = 1). The machine is shared: absolute seconds vary by +-30 %, ratios in one run
are what counts.

Run:  .venv/bin/python bench/bench_scale.py [--sites 1e6 1e7 1e8] [--checks-up-to 1e7] [--workers 2] [--json out.json]
      (--sites 1e9 writes a 64 GB GDSII; give --cases oas to run OASIS alone)
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PERIOD_NM = 325.0
CASES = ("gds", "oas", "levels", "gds+checks", "oas+checks", "oas workers")


def diameter_um(sites: float) -> float:
    """Circle diameter holding about ``sites`` sites of the square lattice: N = (pi / 4) (D / p)^2."""
    return PERIOD_NM * 1e-3 * math.sqrt(4.0 * sites / math.pi)


def _design(sites: float, case: str) -> dict:
    formats = {"gds": ["gds"], "levels": ["gds", "oas"], "gds+checks": ["gds"]}.get(case, ["oas"])
    mask = {"formats": formats, "label": True}
    if case == "levels":
        mask.update({"hierarchy": "levels", "rotation_levels": 16})
    checks = case.endswith("+checks")
    return {
        "design": {"name": "scale", "wavelength_nm": 532.0, "input_spin": 1, "library": "tio2-nanofin-532"},
        "phase": [{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}],
        "aperture": {"shape": "circle", "diameter_um": round(diameter_um(sites), 3)},
        "lattice": {"kind": "square", "period_nm": PERIOD_NM},
        "mask": mask,
        "checks": {"rules": checks, "optics": checks},
    }


def _child(design_path: str, out: str, workers: int) -> dict:
    """One compile in this process: seconds, peak memory, files (run by the parent in a fresh interpreter)."""
    from metalay.api import compile_design, load_design
    from metalay.errors import MetalayError

    t0 = time.perf_counter()
    try:
        res = compile_design(load_design(design_path), out, show_progress=False,
                             workers=workers or None)
    except MetalayError as exc:
        return {"refused": str(exc).split(": ", 1)[-1][:160]}
    seconds = time.perf_counter() - t0
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    self_kb, child_kb = own.ru_maxrss, kids.ru_maxrss
    cpu_s = own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime  # includes imports (~1 s)
    files = {k: v["bytes"] for k, v in res.manifest["files"].items()}
    timings = json.loads((Path(out) / "timings.json").read_text())
    return {"sites": res.manifest["counts"]["sites"], "seconds": seconds, "cpu_s": cpu_s, "peak_mb": self_kb / 1024,
            "worker_peak_mb": child_kb / 1024 if workers else None, "files": files,
            "checks_run": timings.get("checks_run"),
            # checks side by side: the child's peak adds to the parent's (an upper bound of their sum at any time)
            "with_children_mb": (self_kb + child_kb) / 1024 if timings.get("checks_run") == "side by side" else None,
            "write_s": timings.get("layout_and_write_s"), "verdict": res.manifest["verdicts"]["overall"],
            "stages_s": {k: v for k, v in timings.items() if k.endswith("_s") and isinstance(v, (int, float))},
            "check_methods": {k: (v.get("method") or {}).get("method") for k, v in res.manifest["checks"].items()
                              if isinstance(v, dict)}}


def _write_toml(path: Path, data: dict) -> None:
    sys.path.insert(0, str(ROOT / "tests"))
    from conftest import write_toml

    write_toml(path, data)


def run_case(sites: float, case: str, folder: Path, workers: int) -> dict:
    design = folder / f"{case.replace(' ', '_').replace('+', '_')}-{sites:.0e}.toml"
    _write_toml(design, _design(sites, case))
    out = folder / "out"
    w = workers if case == "oas workers" else 0
    proc = subprocess.run([sys.executable, __file__, "--child", str(design), str(out), str(w)], capture_output=True,
                          text=True, cwd=ROOT)
    shutil.rmtree(out, ignore_errors=True)
    if proc.returncode:
        return {"error": (proc.stderr.strip().splitlines() or ["?"])[-1][:200]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _fit_exponent(points) -> float | None:
    """b of time = a * sites^b (least squares in log-log)."""
    pts = [(math.log(n), math.log(t)) for n, t in points if t and t > 0]
    if len(pts) < 2:
        return None
    mx = sum(p[0] for p in pts) / len(pts)
    my = sum(p[1] for p in pts) / len(pts)
    sxx = sum((p[0] - mx) ** 2 for p in pts)
    return sum((p[0] - mx) * (p[1] - my) for p in pts) / sxx if sxx else None


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=float, nargs="+", default=[1e6, 1e7])
    ap.add_argument("--checks-up-to", type=float, default=1e7, help="run the +checks cases up to this size")
    ap.add_argument("--cases", nargs="+", default=None, help=f"subset of {CASES}")
    ap.add_argument("--workers", type=int, default=0, help="add the 'oas workers' case with this many processes")
    ap.add_argument("--json", type=Path, default=None, help="also write the results here")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(_child(args.child[0], args.child[1], int(args.child[2]))))
        return 0
    cases = [c for c in (args.cases or CASES) if c != "oas workers" or args.workers]
    results = []
    print(f"{'sites':>9} {'case':<12} {'s':>8} {'cpu s':>8} {'peak MB':>8} {'GDSII MB':>9} {'OASIS MB':>9} "
          f"{'B/site':>7}  note")
    with tempfile.TemporaryDirectory(dir=ROOT / "out" if (ROOT / "out").is_dir() else None) as tmp:
        for n in args.sites:
            for case in cases:
                if case.endswith("+checks") and n > args.checks_up_to:
                    continue
                r = run_case(n, case, Path(tmp), args.workers)
                r.update(target=n, case=case)
                results.append(r)
                f = r.get("files", {})
                per = (f.get("oas") or f.get("gds") or 0) / r["sites"] if r.get("sites") else 0
                note = r.get("refused") or r.get("error") or (
                    f"workers peak {r['worker_peak_mb']:.0f} MB" if r.get("worker_peak_mb") else "")
                if r.get("with_children_mb"):
                    note += (f"checks side by side: peak with the child {r['with_children_mb']:.0f} MB (sum of "
                             "peaks); ")
                if r.get("check_methods"):
                    st = r.get("stages_s", {})
                    note += " ".join(f"{k} {m} {st.get(f'{k}_s', float('nan')):.1f} s"
                                     for k, m in sorted(r["check_methods"].items()))
                print(f"{r.get('sites', n):>9.3g} {case:<12} {r.get('seconds', float('nan')):>8.2f} "
                      f"{r.get('cpu_s', float('nan')):>8.1f} {r.get('peak_mb', float('nan')):>8.0f} "
                      f"{f.get('gds', 0) / 1e6:>9.1f} "
                      f"{f.get('oas', 0) / 1e6:>9.2f} {per:>7.2f}  {note}", flush=True)
    print("\nratios (same size, same run): OASIS / GDSII")
    for n in args.sites:
        g = next((r for r in results if r["target"] == n and r["case"] == "gds" and "seconds" in r), None)
        o = next((r for r in results if r["target"] == n and r["case"] == "oas" and "seconds" in r), None)
        if g and o:
            print(f"  {n:.0e} sites: time {o['seconds'] / g['seconds']:.2f}x, size "
                  f"{g['files']['gds'] / o['files']['oas']:.1f}x smaller, peak memory "
                  f"{o['peak_mb'] / g['peak_mb']:.2f}x")
    print("\nfitted exponent b of time = a * sites^b")
    for case in cases:
        pts = [(r["sites"], r["seconds"]) for r in results if r["case"] == case and "seconds" in r]
        b = _fit_exponent(pts)
        if b is not None:
            print(f"  {case:<12} b = {b:.3f} over {len(pts)} sizes ({pts[0][0]:.3g} to {pts[-1][0]:.3g} sites)")
    if args.json:
        args.json.write_text(json.dumps(results, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
