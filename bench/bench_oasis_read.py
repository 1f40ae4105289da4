"""Benchmark: the streamed read of a flat OASIS mask against the same design's flat GDSII, in the same run.

One invented demo design (a charge-3 vortex with a 4 degree tilt on the bundled TiO2 nanofin library, 325 nm square
lattice, round aperture sized for ``--sites``) is compiled once to both formats (checks off). Each read then runs in
its own subprocess: :func:`metalay.io.stream_read.iter_mask_chunks` over the frame/label/marks layers (2, 3, 4:
what the compile's report reads) and over the structures layer (1), every chunk hashed (layer, datatype, vertex
counts, vertices: equal digests for both formats show the same polygons). With ``--before PATH`` (a checkout or an
export of another version of the package) both reads also run with that version's readers, so the figures
before and after a change come from the same run and the same files.

    .venv/bin/python bench/bench_oasis_read.py                          # 1e7 sites
    .venv/bin/python bench/bench_oasis_read.py --sites 1e6 --before /path/to/old/checkout
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
LAYERS = {"frame/label/marks": [(2, 0), (3, 0), (4, 0)], "structures": [(1, 0)]}


def child(path: str, which: str) -> None:
    """One streamed read; prints a JSON line with seconds, polygons and a digest of the concatenated chunks."""
    import numpy as np

    from metalay.io.stream_read import iter_mask_chunks

    t0 = time.perf_counter()
    hs = [hashlib.sha256() for _ in range(4)]
    n = 0
    for fp in iter_mask_chunks(path, layers=LAYERS[which]):
        for h, a in zip(hs, (fp.layer, fp.datatype, np.diff(fp.start), fp.xy_db)):
            h.update(np.ascontiguousarray(a).tobytes())
        n += fp.count
    print(json.dumps({"s": time.perf_counter() - t0, "polygons": n,
                      "digest": "".join(h.hexdigest()[:8] for h in hs)}))


def run_child(path: Path, which: str, code_root: Path) -> dict:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "PYTHONPATH": str(code_root)}
    out = subprocess.run([sys.executable, __file__, "--child", str(path), which], capture_output=True, text=True,
                         env=env)
    if out.returncode != 0:
        return {"error": (out.stderr.strip().splitlines() or ["?"])[-1]}
    return json.loads(out.stdout.strip().splitlines()[-1])


def compile_both(folder: Path, sites: float) -> tuple[Path, Path]:
    """The design of ``bench_oasis_stream.py`` written to both formats (imported here: the children must import
    the package from their own ``PYTHONPATH``, not from this checkout)."""
    sys.path[:0] = [str(ROOT / "bench"), str(ROOT / "tests")]
    from bench_oasis_stream import _design

    from conftest import write_toml

    design = _design(sites, "flat")
    design["mask"]["formats"] = ["oas", "gds"]
    write_toml(folder / "design.toml", design)
    cli = Path(sys.executable).parent / "metalay"
    proc = subprocess.run([str(cli), "compile", str(folder / "design.toml"), "--no-checks", "--quiet", "-o",
                           str(folder / "out")], capture_output=True, text=True, cwd=ROOT)
    if proc.returncode:
        raise SystemExit(f"compile failed: {(proc.stderr.strip().splitlines() or ['?'])[-1]}")
    return next((folder / "out").glob("*.oas")), next((folder / "out").glob("*.gds"))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=float, default=1e7)
    ap.add_argument("--before", type=Path, help="another version of the package (its reads are timed too)")
    ap.add_argument("--repeat", type=int, default=1, help="reads of each kind (the best is printed)")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(*args.child)
        return
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}; each read in "
          "its own subprocess, best of", args.repeat)
    with tempfile.TemporaryDirectory() as tmp:
        oas, gds = compile_both(Path(tmp), args.sites)
        print(f"{args.sites:.0e} sites: OASIS {oas.stat().st_size / 1e6:.1f} MB, GDSII "
              f"{gds.stat().st_size / 1e6:.1f} MB")
        for which in LAYERS:
            cases = [("GDSII", gds, ROOT), ("OASIS", oas, ROOT)]
            if args.before:
                cases += [("GDSII before", gds, args.before), ("OASIS before", oas, args.before)]
            rows = {}
            for name, path, code in cases:
                runs = [run_child(path, which, code) for _ in range(args.repeat)]
                ok = [r for r in runs if "error" not in r]
                rows[name] = min(ok, key=lambda r: r["s"]) if ok else runs[0]
            g = rows["GDSII"]
            for name, r in rows.items():
                if "error" in r:
                    print(f"  {which:<18} {name:<13} FAILED ({r['error'][:90]})")
                    continue
                same = "same as GDSII" if r["digest"] == g.get("digest") else "differs from GDSII"
                print(f"  {which:<18} {name:<13} {r['s']:7.2f} s  {r['s'] / g['s']:6.2f}x GDSII  {r['polygons']:>9} "
                      f"polygons, digest {r['digest']} ({same})")
        print(f"load now {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
