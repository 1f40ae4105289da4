"""Memory of flattening placements when reading GDSII: measured against the reader's estimate.

``metalay.io.gdsread.flatten_bytes`` estimates a flattening as 24 B per polygon + 16 B per vertex (the arrays of the
result) + ``FLAT_BYTES_PER_PLACEMENT`` per expanded placement (affine maps, their copies and the temporaries of
composing them). This script reads, each in its own process, (a) an AREF of N x N placements of a one-polygon cell
and (b) a chain of structures each placing the next twice (2^k polygons through 2^(k+1) - 1 placements), and
prints the peak growth of the resident and virtual size against the estimate, and the bytes per placement that
the measurement implies once the result arrays are taken out:

    .venv/bin/python bench/bench_read_budget.py              # N = 1000, 2000; k = 20, 22
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

import hostile_corpus as hc  # noqa: E402

_CHILD = r"""
import json, resource, sys
def vm(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) * 1024
from metalay.io.gdsread import flatten_bytes, read_mask
import numpy as np
base_v, base_r = vm("VmSize"), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
flat = read_mask(sys.argv[1], max_memory_bytes=1 << 40)
print(json.dumps({"polygons": flat.count, "vertices": int(flat.xy_db.shape[0]),
                  "virtual": vm("VmPeak") - base_v,
                  "resident": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 - base_r}))
"""


def run(path: Path) -> dict:
    proc = subprocess.run([sys.executable, "-c", _CHILD, str(path)], capture_output=True, text=True, cwd=ROOT)
    if proc.returncode:
        raise SystemExit(proc.stderr[-2000:])
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--aref", type=int, nargs="*", default=[1000, 2000])
    ap.add_argument("--chain", type=int, nargs="*", default=[20, 22])
    args = ap.parse_args()
    from metalay.io.gdsread import FLAT_BYTES_PER_PLACEMENT, flatten_bytes

    cases = []
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.aref:
            p = Path(tmp) / f"aref{n}.gds"
            p.write_bytes(hc.gds([("A", [hc.boundary(1, 0, hc.FIN)]),
                                  ("T", [hc.aref("A", n, n, (0, 0), (n * 300, 0), (0, n * 300))])]))
            cases.append((f"AREF {n} x {n}", p, n * n + 1))
        for k in args.chain:
            chain = [(f"C{k}", [hc.boundary(1, 0, hc.FIN)])] + [
                (f"C{j}", [hc.sref(f"C{j + 1}", 0, 0), hc.sref(f"C{j + 1}", 7, 0)]) for j in range(k - 1, -1, -1)]
            p = Path(tmp) / f"chain{k}.gds"
            p.write_bytes(hc.gds(chain))
            cases.append((f"2^{k} fan-out", p, 2 ** (k + 1) - 1))
        print(f"{'case':18s} {'polygons':>10s} {'estimate MB':>11s} {'resident MB':>11s} {'virtual MB':>10s} "
              f"{'B/placement':>11s}")
        for label, path, inst in cases:
            r = run(path)
            est = flatten_bytes(r["polygons"], r["vertices"], inst)
            result_bytes = 24 * r["polygons"] + 16 * r["vertices"]
            per = (max(r["resident"], r["virtual"]) - result_bytes) / inst
            print(f"{label:18s} {r['polygons']:10d} {est / 1e6:11.0f} {r['resident'] / 1e6:11.0f} "
                  f"{r['virtual'] / 1e6:10.0f} {per:11.0f}   (estimate / measured "
                  f"{est / max(r['resident'], r['virtual']):.2f})")
    print(f"FLAT_BYTES_PER_PLACEMENT = {FLAT_BYTES_PER_PLACEMENT}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
