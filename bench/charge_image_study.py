"""Success rate of the charge readers on simulated camera images, charges -10..10, written to and read back from
PNG 8-bit, PNG 16-bit and TIFF 16-bit files.

Run:  .venv/bin/python bench/charge_image_study.py [--draws 6] [--seed 1] [--isolate]

Each draw is a randomised scene from ``metalay.measure.camerasim.study_scene`` (noise, background, gradient, tilt,
off-centre beam; ranges in its docstring), encoded to the file format of the draw (cycling png8, png16, tiff16),
written to a temporary folder, read back with ``imagecharge.read_image`` and read by the method's reader.
Prints the success rate per method and per format, the unreadable and wrong counts, and the time per reading.
The scenes are invented; a reading that says "unreadable" counts as a failure.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from metalay.measure import camerasim, imagecharge  # noqa: E402

READERS = {"fork": imagecharge.read_fork, "spiral": imagecharge.read_spiral, "triangle": imagecharge.read_triangle}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=6, help="scenes per charge and method")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--isolate", action="store_true", help="decode every file in a child process (slower)")
    args = ap.parse_args(argv)
    formats = [f[0] for f in camerasim.STUDY_FORMATS]
    with tempfile.TemporaryDirectory() as tmp:
        for method, reader in READERS.items():
            rng = np.random.default_rng([args.seed, list(READERS).index(method)])
            ok = {f: [0, 0] for f in formats}
            wrong = unread = 0
            t0 = time.perf_counter()
            for charge in range(-10, 11):
                for k in range(args.draws):
                    fmt = formats[k % 3]
                    data, hints = camerasim.study_scene(method, charge, rng, fmt=fmt)
                    path = Path(tmp) / f"{method}_{charge}_{k}.{'tif' if fmt == 'tiff16' else 'png'}"
                    path.write_bytes(data)
                    img = imagecharge.read_image(path, isolate=args.isolate)
                    r = reader(img, **hints)
                    ok[fmt][0] += r.charge == charge
                    ok[fmt][1] += 1
                    wrong += r.charge is not None and r.charge != charge
                    unread += r.charge is None
            n = sum(v[1] for v in ok.values())
            good = sum(v[0] for v in ok.values())
            dt = (time.perf_counter() - t0) / n
            per = ", ".join(f"{f} {v[0]}/{v[1]}" for f, v in ok.items())
            print(f"{method:<8} success {good}/{n} = {100 * good / n:.1f} %  ({per}); unreadable {unread}, wrong "
                  f"{wrong}; {dt:.2f} s per image")


if __name__ == "__main__":
    main()
