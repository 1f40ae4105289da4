"""The supercell proof of the side convention (docs/side.md): a blazed geometric-phase grating of 8 written fins
solved whole by the RCWA solver for light through the substrate, onto the structures and in reflection, against
the optical check's prediction from the written mask.

Usage::

    .venv/bin/python bench/supercell_table.py [--harmonics 16,2 24,3 32,4] [-o out/supercell]

Prints one markdown table row per case, spin and truncation: the order the check predicts, the order the supercell
solve puts most power in, its efficiency, the check's local-periodic efficiency (converted power) and the
difference, then the seconds per truncation. Run it with one BLAS thread (set here) on a quiet machine.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

from metalay.studies.supercell import CASES, supercell_rows  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--harmonics", nargs="+", default=["16,2", "24,3", "32,4"],
                    help="truncations (Mx,My) of the 8-fin supercell")
    ap.add_argument("--cases", nargs="+", default=[c.name for c in CASES])
    ap.add_argument("-o", "--output", default="out/supercell")
    args = ap.parse_args()
    harmonics = tuple(tuple(int(v) for v in h.split(",")) for h in args.harmonics)
    cases = tuple(c for c in CASES if c.name in args.cases)
    print("| case | spin | order (check) | order (RCWA) | efficiency RCWA | efficiency check | RCWA - check | "
          "harmonics |")
    print("|---|---|---|---|---|---|---|---|")
    for case in cases:  # three cases
        for h in harmonics:  # a few truncations
            t0 = time.perf_counter()
            rows = supercell_rows(args.output, cases=(case,), harmonics=(h,))
            for r in rows:
                print(r.markdown(), flush=True)
            print(f"<!-- {case.name} {h}: {time.perf_counter() - t0:.1f} s, RCWA total in all orders "
                  f"{rows[0].rcwa_total:.4f} -->", flush=True)


if __name__ == "__main__":
    main()
