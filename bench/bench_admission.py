"""Bytes per site of each compile stage, measured, for the memory admission of ``metalay compile``.

Each configuration is compiled at two sizes, each run in its own process; the peak virtual size (``VmPeak``, what
an address-space limit such as ``ulimit -v`` counts) and the peak resident size (``ru_maxrss``) are read at the
end, relative to the process's size just before the compile. The slope between the two sizes is the stage's
bytes per site, the rest its fixed part:

    .venv/bin/python bench/bench_admission.py                  # 1e6 and 4e6 sites (a few minutes)
    .venv/bin/python bench/bench_admission.py --sites 2e5 1.2e6  # quicker (tiles not yet saturated: larger slopes)

Configurations: ``layout`` (flat GDSII only, no checks: streamed tile by tile), ``grouped`` (GDSII + OASIS, both
streamed since issue 15; before, gdstk held every site until the end), ``levels`` (hierarchy with one master cell
per rotation level), ``rules`` (flat GDSII + the design-rule check) and ``optics`` (flat GDSII + the optical check).
The constants in ``metalay/mask/compile.py`` (``LAYOUT_BYTES_PER_SITE``, ``COMPILE_FIXED_BYTES``; the plateau
``LAYOUT_PLATEAU_SITES`` comes from ``bench/bench_scale.py``) and
``metalay/checks/steps.py`` (``RULES_BYTES_PER_SITE``, ``OPTICS_BYTES_PER_SITE``) come from this script; the
figures last measured are in DEVELOPERS.md.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

CONFIGS = {
    "layout": ({"formats": ["gds"]}, {"rules": False, "optics": False}),
    "grouped": ({"formats": ["gds", "oas"]}, {"rules": False, "optics": False}),
    "levels": ({"formats": ["gds", "oas"], "hierarchy": "levels", "rotation_levels": 16},
               {"rules": False, "optics": False}),
    "rules": ({"formats": ["gds"]}, {"rules": True, "optics": False}),
    "optics": ({"formats": ["gds"]}, {"rules": False, "optics": True}),
}

_CHILD = r"""
import json, resource, sys, time
from pathlib import Path

def vm(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) * 1024
    return 0

from metalay.api import compile_design, parse_design
from metalay.checks.steps import default_checks
import metalay.checks.optics, metalay.checks.rules  # imported before the baseline, like a compile that runs them
spec = json.loads(sys.argv[1])
design = parse_design(spec, where="bench")
base_v, base_r = vm("VmSize"), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
t0 = time.perf_counter()
res = compile_design(design, sys.argv[2], show_progress=False)
print(json.dumps({"sites": res.manifest["counts"]["sites"], "seconds": time.perf_counter() - t0,
                  "peak_virtual": vm("VmPeak") - base_v,
                  "peak_resident": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 - base_r}))
"""


def design_for(sites: float, mask: dict, checks: dict) -> dict:
    period_um = 0.325
    diameter = 2.0 * math.sqrt(sites * period_um ** 2 / math.pi)
    return {"design": {"name": "bench-admission", "wavelength_nm": 532.0, "input_spin": 1,
                       "library": "tio2-nanofin-532"},
            "phase": [{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}],
            "aperture": {"shape": "circle", "diameter_um": round(diameter, 3)},
            "lattice": {"kind": "square", "period_nm": 325.0},
            "mask": {**mask, "label": False}, "checks": checks}


def measure(config: str, sites: float) -> dict:
    mask, checks = CONFIGS[config]
    with tempfile.TemporaryDirectory() as tmp:
        proc = subprocess.run([sys.executable, "-c", _CHILD, json.dumps(design_for(sites, mask, checks)),
                               str(Path(tmp) / "out")], capture_output=True, text=True, cwd=ROOT)
    if proc.returncode != 0:
        raise SystemExit(f"{config} at {sites:g} sites failed: {proc.stderr[-2000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=float, nargs=2, default=[1e6, 4e6])
    ap.add_argument("--configs", nargs="*", default=list(CONFIGS))
    args = ap.parse_args()
    print(f"{'config':8s} {'sites':>9s} {'s':>6s} {'virtual MB':>10s} {'resident MB':>11s}")
    rows = {}
    for cfg in args.configs:
        pts = []
        for n in args.sites:
            r = measure(cfg, n)
            pts.append(r)
            print(f"{cfg:8s} {r['sites']:9d} {r['seconds']:6.1f} {r['peak_virtual'] / 1e6:10.0f} "
                  f"{r['peak_resident'] / 1e6:11.0f}", flush=True)
        (a, b) = pts
        dn = b["sites"] - a["sites"]
        slope_v = (b["peak_virtual"] - a["peak_virtual"]) / dn
        slope_r = (b["peak_resident"] - a["peak_resident"]) / dn
        fixed_v = b["peak_virtual"] - max(slope_v, slope_r) * b["sites"]
        rows[cfg] = (slope_v, slope_r, fixed_v)
    print("\nbytes per site (slope between the two sizes) and fixed part (virtual, at the larger slope):")
    for cfg, (sv, sr, fv) in rows.items():
        print(f"  {cfg:8s} virtual {sv:7.1f} B/site, resident {sr:7.1f} B/site, larger {max(sv, sr):7.1f} B/site, "
              f"fixed {fv / 1e6:7.0f} MB")
    if "layout" in rows:
        base = rows["layout"][0]
        print("ratios to the flat-GDSII layout (virtual B/site): " + ", ".join(
            f"{cfg} {sv / base:.1f}x" for cfg, (sv, _, _) in rows.items() if base > 0))
    return 0


if __name__ == "__main__":
    sys.exit(main())
