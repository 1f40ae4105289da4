"""``metalay compare`` and ``metalay tolerance``: library comparison and fabrication-tolerance studies.

Registered by :mod:`metalay.cli` (``add_parser(subparsers)``; each subcommand sets ``func``).  Only this module
prints; the work is done by :mod:`metalay.studies.study`.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

from metalay.errors import MetalayError

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    """Register the ``compare`` and ``tolerance`` subcommands."""
    p = subparsers.add_parser(
        "compare", help="compile one design with several cell libraries and compare efficiency, leakage, purity, "
                        "design-rule margin and file size",
        description="Compile the same design with each library, run the design rules and the optical check on each "
                    "written mask, and write a side-by-side table (terminal, CSV, JSON) and plots.")
    p.add_argument("design", type=Path, help="design file (.toml)")
    p.add_argument("--library", action="append", required=True, metavar="NAME_OR_PATH",
                   help="cell library (bundled name or *.library.json); give it once per library")
    p.add_argument("-o", "--output", type=Path, help="output folder (default out/<design stem>-compare)")
    p.add_argument("--keep-design", action="store_true",
                   help="use the design's wavelength and period for every library (default: each library's own)")
    p.add_argument("--workers", type=int, default=None, help="processes over libraries (default: cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no table")
    p.set_defaults(func=run, study_command="compare")

    p = subparsers.add_parser(
        "tolerance", help="Monte Carlo over fabrication errors (CD bias, rotation, missing elements, detuning)",
        description="Perturb the elements of the compiled design and evaluate each sample with the optical check "
                    "(no masks are re-written); report median, 5th and 95th percentiles of efficiency and purity.")
    p.add_argument("design", type=Path, help="design file (.toml)")
    p.add_argument("-o", "--output", type=Path, help="output folder (default out/<design stem>-tolerance)")
    p.add_argument("--mask", type=Path, help="mask already compiled from the design (default: compile it)")
    p.add_argument("--samples", type=int, default=200, help="Monte Carlo samples (default 200)")
    p.add_argument("--cd-bias-nm", type=float, nargs=2, default=(0.0, 0.0), metavar=("MEAN", "SD"),
                   help="critical-dimension bias per edge: mean and standard deviation in nm (one draw per sample)")
    p.add_argument("--rotation-jitter-deg", type=float, default=0.0,
                   help="standard deviation of each element's rotation error (degrees)")
    p.add_argument("--missing-fraction", type=float, default=0.0, help="probability that an element is missing")
    p.add_argument("--detune-nm", type=float, default=0.0,
                   help="standard deviation of the illumination wavelength offset (nm, one draw per sample)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--purity-threshold", type=float, default=None,
                   help="sweep each error kind and report the magnitude at which the 5th percentile of purity "
                        "drops below this value")
    p.add_argument("--sweep-samples", type=int, default=24, help="samples per sweep level (default 24)")
    p.add_argument("--max-side", type=int, default=1024, help="largest near-field grid side (default 1024)")
    p.add_argument("--workers", type=int, default=None, help="processes over samples (default: cores)")
    p.add_argument("--no-plots", action="store_true", help="numbers only")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    p.set_defaults(func=run, study_command="tolerance")


def _fmt(v, spec=".4f"):
    if v is None:
        return "-"
    if isinstance(v, float):
        return format(v, spec)
    return str(v)


def _positive_int(name, v, lo=1, hi=None):
    if v is None:
        return
    if v < lo or (hi is not None and v > hi):
        raise MetalayError(f"command line: --{name} = {v!r}; allowed {lo}..{hi if hi else 'any'}")


def _run_compare(args) -> int:
    from metalay.api import prepare_design
    from metalay.checks.optics import SAFETY_NOTE
    from metalay.design.spec import load_design
    from metalay.studies.study import compare_libraries

    _positive_int("workers", args.workers, 1, 256)
    design = prepare_design(load_design(args.design))[0]  # optimised multiplex encodings, as compile writes them
    out = args.output or Path("out") / f"{args.design.stem}-compare"
    res = compare_libraries(design, args.library, out, adapt=not args.keep_design, workers=args.workers,
                            show_progress=False if args.quiet else None)
    if args.quiet:
        return 0
    cols = [("library", "library", "s"), ("mode", "mode", "s"), ("wavelength_nm", "lambda nm", ".1f"),
            ("converted", "converted", ".4f"), ("leakage", "leakage", ".4f"),
            ("designed_spot_efficiency", "spot eff", ".4f"), ("designed_mode_efficiency", "mode eff", ".4f"),
            ("purity", "purity", ".4f"), ("rule_violations", "violations", "d"),
            ("worst_rule", "tightest rule", "s"), ("worst_rule_relative_margin", "margin", ".3f"),
            ("elements", "elements", ",d"), ("gds_bytes", "GDS MB", ".2f"), ("oas_bytes", "OAS MB", ".2f")]
    table = []
    for r in res.rows:
        cells = []
        for key, _, spec in cols:
            v = r.get(key)
            if key.endswith("bytes") and v is not None:
                v = v / 1e6
            cells.append("-" if v is None else (format(v, spec) if spec != "s" else str(v)))
        table.append(cells)
    widths = [max(len(h), *(len(t[k]) for t in table)) for k, (_, h, _) in enumerate(cols)]
    print("  ".join(h.rjust(w) for (_, h, _), w in zip(cols, widths)))
    for t in table:
        print("  ".join(c.rjust(w) for c, w in zip(t, widths)))
    for note in res.notes:
        print(f"note: {note}")
    print(f"output folder: {out}")
    print(SAFETY_NOTE)
    return 0


def _run_tolerance(args) -> int:
    from metalay.checks.optics import SAFETY_NOTE
    from metalay.design.spec import load_design
    from metalay.studies.study import ToleranceSettings, tolerance_study

    _positive_int("workers", args.workers, 1, 256)
    _positive_int("max-side", args.max_side, 64, 16384)
    for name, v in (("cd-bias-nm", args.cd_bias_nm[0]), ("cd-bias-nm", args.cd_bias_nm[1]),
                    ("rotation-jitter-deg", args.rotation_jitter_deg), ("missing-fraction", args.missing_fraction),
                    ("detune-nm", args.detune_nm)):
        if not math.isfinite(v):
            raise MetalayError(f"command line: --{name} = {v!r}; allowed: a finite number")
    settings = ToleranceSettings(samples=args.samples, cd_bias_mean_nm=args.cd_bias_nm[0],
                                 cd_bias_sd_nm=args.cd_bias_nm[1], rotation_sd_deg=args.rotation_jitter_deg,
                                 missing_fraction=args.missing_fraction, detune_sd_nm=args.detune_nm,
                                 seed=args.seed, purity_threshold=args.purity_threshold,
                                 sweep_samples=args.sweep_samples)
    settings.validate(where="command line")
    from metalay.api import prepare_design

    design = prepare_design(load_design(args.design))[0]  # optimised multiplex encodings, as compile writes them
    out = args.output or Path("out") / f"{args.design.stem}-tolerance"
    res = tolerance_study(design, out, settings=settings, mask=args.mask, max_side=args.max_side,
                          workers=args.workers, show_progress=False if args.quiet else None,
                          make_plots=not args.no_plots)
    if args.quiet:
        return 0
    print(f"{settings.samples} samples, seed {settings.seed}: figure  nominal  median  [5th, 95th percentile]")
    for key, st in res.statistics.items():
        if st is None:
            continue
        print(f"  {key:<26} {_fmt(res.nominal.get(key))}  {st['median']:.4f}  [{st['p5']:.4f}, {st['p95']:.4f}]")
    for kind, t in res.thresholds.items():
        if t["tolerance"] is None:
            print(f"purity stays >= {t['threshold']:g} ({t['criterion']}) for {kind} up to {t['sweep_max']:.4g} "
                  f"{t['unit']} (the largest swept)")
        else:
            print(f"purity drops below {t['threshold']:g} ({t['criterion']}) at {kind} = {t['tolerance']:.4g} "
                  f"{t['unit']}")
    for note in res.notes:
        print(f"note: {note}")
    print(f"output folder: {out}")
    print(SAFETY_NOTE)
    return 0


def run(args: argparse.Namespace) -> int:
    """Run ``compare`` or ``tolerance`` (chosen by the parser's ``study_command`` default)."""
    if args.study_command == "compare":
        return _run_compare(args)
    return _run_tolerance(args)
