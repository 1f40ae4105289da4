"""Benchmark: reading an OASIS mask whole versus as a stream of polygon chunks, time and peak resident memory.

For each size an OASIS-only mask is compiled with ``metalay compile`` (checks off) from an invented demo design (a
charge-3 vortex with a 4 degree tilt on the bundled TiO2 nanofin library, 325 nm square lattice, round aperture
sized for the wanted number of sites): flat (one POLYGON record with a repetition per shape and tile, in CBLOCKs),
and with ``--hierarchy levels`` (rotation-level cells placed with repetitions) unless ``--flat-only``. Then each
read runs in its own subprocess (its peak is its ``VmHWM``):

* whole: :func:`metalay.io.gdsread.read_mask` (the flattened mask in memory);
* streamed: :func:`metalay.io.stream_read.iter_mask_chunks`, each chunk hashed and dropped;
* count: :func:`metalay.io.stream_read.count_polygons` (the survey pass alone).

Both reads hash the layer, datatype, vertex-count and vertex arrays (SHA-256 of each, chunk by chunk): equal
digests show the chunks concatenated are the whole read. Ratios streamed / whole are printed from the same run.

    .venv/bin/python bench/bench_oasis_stream.py                  # 1e6 and 1e7 sites
    .venv/bin/python bench/bench_oasis_stream.py --sites 1e6      # quick
    .venv/bin/python bench/bench_oasis_stream.py --sites 1e8 --whole-up-to 1e7
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

PERIOD_NM = 325.0

from bench_stream_checks import peak_mb  # noqa: E402  (VmHWM of this process)


def _design(sites: float, hierarchy: str) -> dict:
    mask = {"formats": ["oas"], "label": True}
    if hierarchy == "levels":
        mask.update({"hierarchy": "levels", "rotation_levels": 16})
    return {
        "design": {"name": "bench-oas", "wavelength_nm": 532.0, "input_spin": 1, "library": "tio2-nanofin-532"},
        "phase": [{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}],
        "aperture": {"shape": "circle",
                     "diameter_um": round(PERIOD_NM * 1e-3 * math.sqrt(4.0 * sites / math.pi), 3)},
        "lattice": {"kind": "square", "period_nm": PERIOD_NM},
        "mask": mask,
        "checks": {"rules": False, "optics": False},
    }


def rss_parts_mb() -> tuple[float, float]:
    """Resident anonymous memory and resident file pages (the mapped mask) of this process now, MB."""
    out = {"RssAnon:": 0.0, "RssFile:": 0.0}
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.split()[0] in out:
                    out[line.split()[0]] = int(line.split()[1]) / 1024.0
    except (OSError, IndexError):
        pass
    return out["RssAnon:"], out["RssFile:"]


def child(kind: str, path: str) -> None:
    """One read of ``path``; prints a JSON line with seconds, peak MB, polygons and the digest."""
    import numpy as np

    from metalay.io.gdsread import read_mask
    from metalay.io.stream_read import count_polygons, iter_mask_chunks

    base = peak_mb()
    t0 = time.perf_counter()
    hs = [hashlib.sha256() for _ in range(4)]
    n = chunks = 0
    anon = file = 0.0
    if kind == "count":
        n, nv = count_polygons(path)
        digest = f"{n} polygons, {nv} vertices"
    else:
        parts = [read_mask(path)] if kind == "whole" else iter_mask_chunks(path)
        for fp in parts:
            for h, a in zip(hs, (fp.layer, fp.datatype, np.diff(fp.start), fp.xy_db)):
                h.update(np.ascontiguousarray(a).tobytes())
            n += fp.count
            chunks += 1
            a, f = rss_parts_mb()  # sampled at every chunk: which part of the resident set grows
            anon, file = max(anon, a), max(file, f)
            del fp
        digest = "".join(h.hexdigest()[:8] for h in hs)
    print(json.dumps({"s": time.perf_counter() - t0, "peak_mb": peak_mb(), "import_mb": base, "polygons": n,
                      "chunks": chunks, "digest": digest, "anon_mb": anon, "file_mb": file}))


def run_child(kind: str, path: str) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", kind, path], capture_output=True, text=True,
                         env={**os.environ, "OPENBLAS_NUM_THREADS": "1"})
    if out.returncode != 0:
        return {"error": (out.stderr.strip().splitlines() or ["?"])[-1]}
    return json.loads(out.stdout.strip().splitlines()[-1])


def make_mask(folder: Path, sites: float, hierarchy: str) -> tuple[Path, float]:
    sys.path.insert(0, str(ROOT / "tests"))
    from conftest import write_toml

    design = folder / f"{hierarchy}.toml"
    write_toml(design, _design(sites, hierarchy))
    t0 = time.perf_counter()
    cli = Path(sys.executable).parent / "metalay"
    proc = subprocess.run([str(cli), "compile", str(design), "--no-checks", "--quiet", "-o", str(folder / hierarchy)],
                          capture_output=True, text=True, cwd=ROOT)
    if proc.returncode:
        raise SystemExit(f"compile failed: {(proc.stderr.strip().splitlines() or ['?'])[-1]}")
    return next((folder / hierarchy).glob("*.oas")), time.perf_counter() - t0


def fmt(r: dict) -> str:
    if "error" in r:
        return f"FAILED ({r['error'][:90]})"
    parts = ""
    if r["chunks"]:
        parts = f"  (largest at a chunk: {r['anon_mb']:.0f} MB anonymous, {r['file_mb']:.0f} MB file pages)"
    return (f"{r['s']:7.1f} s {r['peak_mb']:7.0f} MB (after imports {r['import_mb']:4.0f} MB)  {r['chunks']:5d} "
            f"chunks  {r['digest']}{parts}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=float, nargs="*", default=[1e6, 1e7])
    ap.add_argument("--whole-up-to", type=float, default=1e7, help="largest size for the whole read")
    ap.add_argument("--flat-only", action="store_true", help="skip the hierarchical (levels) masks")
    ap.add_argument("--keep", help="folder to keep the masks in (default: a temporary folder)")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(*args.child)
        return
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}; each read in "
          "its own subprocess")
    with tempfile.TemporaryDirectory(dir=args.keep) as tmp:
        for sites in args.sites:
            for hierarchy in ("flat",) if args.flat_only else ("flat", "levels"):
                folder = Path(tmp) / f"s{sites:.0e}"
                folder.mkdir(exist_ok=True)
                path, compile_s = make_mask(folder, sites, hierarchy)
                print(f"\n{sites:.0e} sites, {hierarchy}: OASIS {path.stat().st_size / 1e6:.1f} MB, compiled in "
                      f"{compile_s:.1f} s")
                rows = {"count": run_child("count", str(path))}
                if sites <= args.whole_up_to:
                    rows["whole"] = run_child("whole", str(path))
                rows["streamed"] = run_child("stream", str(path))
                for name, r in rows.items():
                    print(f"  {name:<9} {fmt(r)}")
                w, s = rows.get("whole"), rows["streamed"]
                if w and "error" not in w and "error" not in s:
                    print(f"  streamed / whole: time {s['s'] / w['s']:.2f}x, peak {s['peak_mb'] / w['peak_mb']:.2f}x"
                          f"; digests {'equal' if s['digest'] == w['digest'] else 'DIFFERENT'}, polygons "
                          f"{s['polygons']} / {w['polygons']}; load now {os.getloadavg()[0]:.1f}")
                path.unlink()


if __name__ == "__main__":
    main()
