"""Soak test of the mask readers and the design-rule check on hostile and mutated files.

Builds the seeded corpus of ``tests/hostile_corpus.py`` (the hostile cases, the valid seeds and N mutations of
them), reads and checks every file in its own forked process under an address-space cap (1 GB by default) and
prints the crashes (a signal), internal errors (an exception that is not a ``MetalayError``), timeouts, and the
largest CPU time, wall time and peak resident memory per file:

    .venv/bin/python bench/soak_hostile.py --files 10000              # about 10 minutes on 2 cores
    .venv/bin/python bench/soak_hostile.py --files 2000 --seed 7 --keep out/soak   # keep the corpus

Exit status 1 when any file crashed, hit an internal error, timed out, or took >= 5 s of CPU or >= 1 GB.
"""

from __future__ import annotations

import argparse
import collections
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

import hostile_corpus as hc  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--files", type=int, default=10_000, help="mutated files (plus the hostile cases and seeds)")
    ap.add_argument("--seed", type=int, default=20240613)
    ap.add_argument("--cap-gb", type=float, default=1.0, help="address-space cap per file (RLIMIT_AS), GB (2^30)")
    ap.add_argument("--timeout-s", type=int, default=60)
    ap.add_argument("--keep", type=Path, help="keep the corpus in this folder (default: a temporary folder)")
    args = ap.parse_args()
    folder = args.keep or Path(tempfile.mkdtemp(prefix="metalay-soak-"))
    t0 = time.perf_counter()
    expect = hc.build_corpus(folder, mutations=args.files, seed=args.seed)
    t_build = time.perf_counter() - t0
    done = [0]

    def progress(res):
        done[0] += 1
        if done[0] % 500 == 0:
            print(f"  {done[0]} / {len(expect)} files", file=sys.stderr, flush=True)

    t0 = time.perf_counter()
    results = hc.run_corpus([folder / n for n in sorted(expect)], cap_bytes=int(args.cap_gb * (1 << 30)),
                            timeout_s=args.timeout_s, on_result=progress)
    t_run = time.perf_counter() - t0
    outcomes = collections.Counter(r["outcome"] for r in results)
    wrong = [r for r in results if expect[r["name"]] is not None and r["outcome"] != "refused"]
    print(f"corpus: {len(expect)} files ({args.files} mutations, seed {args.seed}) built in {t_build:.1f} s, read "
          f"and checked in {t_run:.1f} s, cap {args.cap_gb:g} GB per file")
    print("outcomes: " + ", ".join(f"{k} {v}" for k, v in sorted(outcomes.items())))
    for key, unit in (("cpu_s", "s CPU"), ("wall_s", "s wall"), ("maxrss_mb", "MB peak resident")):
        top = max(results, key=lambda r: r[key])
        print(f"max {unit}: {top[key]:.3f} ({top['name']}, {top['outcome']})")
    bad = [r for r in results if r["outcome"] in ("crash", "internal", "timeout")]
    slow = [r for r in results if r["cpu_s"] >= 5.0 or r["maxrss_mb"] >= 1024]
    print(f"crashes {outcomes['crash']}, internal errors {outcomes['internal']}, timeouts {outcomes['timeout']}, "
          f"files >= 5 s CPU or >= 1 GB: {len(slow)}, hostile cases not refused: {len(wrong)}")
    for r in bad + slow + wrong:
        print(f"  {r['name']}: {r['outcome']} {r['detail'][:300]}")
        if r.get("trace"):
            print("    " + r["trace"].strip().replace("\n", "\n    "))
    if args.keep is None:
        shutil.rmtree(folder, ignore_errors=True)
    return 1 if bad or slow or wrong else 0


if __name__ == "__main__":
    sys.exit(main())
