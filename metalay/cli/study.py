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
    p.add_argument("--cd-response", choices=("solved", "nominal"), default="solved",
                   help="CD bias of a library with one size per cell: solve the biased cells with metalay's RCWA "
                        "(default) or keep the nominal responses ('nominal': CD bias is then not evaluated)")
    p.add_argument("--bias-harmonics", type=int, default=None, metavar="N",
                   help="truncation (orders per axis) of the biased-cell solves (default: the library's recorded "
                        "truncation at each wavelength)")
    p.add_argument("--bias-step-nm", type=float, default=0.5,
                   help="bias grid of the solved cells, interpolated between nodes (default 0.5 nm)")
    p.add_argument("--cell-cache", type=Path, default=None, metavar="DIR",
                   help="folder that keeps solved biased cells between runs (default: none)")
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


def _table(head, rows, right) -> list[str]:
    """Aligned text table; columns in ``right`` are right-aligned (numbers)."""
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h) for k, h in enumerate(head)]
    out = ["  ".join(h.rjust(w) if k in right else h.ljust(w) for k, (h, w) in enumerate(zip(head, widths)))]
    out += ["  ".join(c.rjust(w) if k in right else c.ljust(w) for k, (c, w) in enumerate(zip(r, widths)))
            for r in rows]
    return out


#: compare columns: key, header (with unit), format; grouped: what, optics, design rules, files.
_COMPARE_COLUMNS = (("library", "library", "s"), ("mode", "mode", "s"), ("wavelength_nm", "lambda (nm)", ".1f"),
                    ("converted", "converted (1)", ".4f"), ("leakage", "leakage (1)", ".4f"),
                    ("designed_spot_efficiency", "spot eff. (1)", ".4f"),
                    ("designed_mode_efficiency", "mode eff. (1)", ".4f"), ("purity", "purity (1)", ".4f"),
                    ("rule_violations", "violations", "d"), ("worst_rule", "tightest rule", "s"),
                    ("worst_rule_relative_margin", "margin (%)", "pct"), ("elements", "elements", ",d"),
                    ("gds_bytes", "GDS (MB)", ".2f"), ("oas_bytes", "OAS (MB)", ".2f"))


def _run_compare(args) -> int:
    from metalay.api import prepare_design
    from metalay.checks.optics import SAFETY_NOTE
    from metalay.cli._output import detail, tell
    from metalay.design.spec import load_design
    from metalay.studies.study import compare_libraries

    _positive_int("workers", args.workers, 1, 256)
    design = prepare_design(load_design(args.design))[0]  # optimised multiplex encodings, as compile writes them
    out = args.output or Path("out") / f"{args.design.stem}-compare"
    res = compare_libraries(design, args.library, out, adapt=not args.keep_design, workers=args.workers,
                            show_progress=False if args.quiet or args.json else None)
    args.result = {"out_dir": str(out), "rows": list(res.rows), "notes": list(res.notes), "caution": SAFETY_NOTE}
    for note in res.notes:
        tell(args, f"note: {note}")
    if args.quiet or args.json:
        return 0
    table = []
    for r in res.rows:
        cells = []
        for key, _, spec in _COMPARE_COLUMNS:
            v = r.get(key)
            if key.endswith("bytes") and v is not None:
                v = v / 1e6
            if v is None:
                cells.append("-")
            elif spec == "pct":
                cells.append(f"{100 * v:.1f}")
            else:
                cells.append(format(v, spec) if spec != "s" else str(v))
        table.append(cells)
    right = {k for k, (_, _, spec) in enumerate(_COMPARE_COLUMNS) if spec != "s"}
    for line in _table([h for _, h, _ in _COMPARE_COLUMNS], table, right):
        print(line)
    print("converted, leakage, efficiencies: fractions of the incident power; margin: of the tightest rule's limit")
    print(f"output folder: {out}")
    detail(args, f"details: {sorted(res.details)}")
    return 0


def _tolerance_lines(settings, res) -> list[str]:
    """The tolerance result as grouped tables: the figures (nominal, median, percentiles) and the thresholds."""
    rows, counted = [], []
    for key, st in res.statistics.items():
        if st is None:
            continue
        if "counts" in st:  # fringe charge and verdict: samples per value
            counts = ", ".join(f"{k}: {n}" for k, n in st["counts"].items())
            counted.append(f"  {key}: nominal {_fmt(res.nominal.get(key))}; samples by value: {counts}")
            continue
        unit = "dB" if key.endswith("_db") else "um" if key.endswith("_um") else "1"
        rows.append((key, unit, _fmt(res.nominal.get(key)), f"{st['median']:.4f}", f"{st['p5']:.4f}",
                     f"{st['p95']:.4f}"))
    lines = [f"{settings.samples} samples, seed {settings.seed} (fractions of the incident power unless a unit says "
             "otherwise)"]
    lines += ["  " + t for t in _table(("figure", "unit", "nominal", "median", "5th pct", "95th pct"), rows,
                                       {2, 3, 4, 5})]
    lines += counted
    if res.thresholds:
        trows = []
        for kind, t in res.thresholds.items():
            at = f">= {t['sweep_max']:.4g} (largest swept)" if t["tolerance"] is None else f"{t['tolerance']:.4g}"
            trows.append((kind, at, t["unit"], f"{t['threshold']:g}", t["criterion"]))
        lines.append("purity threshold crossings:")
        lines += ["  " + t for t in _table(("error kind", "purity falls below at", "unit", "threshold", "criterion"),
                                           trows, {1, 3})]
    return lines


def _run_tolerance(args) -> int:
    from metalay.checks.optics import SAFETY_NOTE
    from metalay.cli._output import tell
    from metalay.design.spec import load_design
    from metalay.studies.study import ToleranceSettings, tolerance_study

    _positive_int("workers", args.workers, 1, 256)
    _positive_int("max-side", args.max_side, 64, 16384)
    for name, v in (("cd-bias-nm", args.cd_bias_nm[0]), ("cd-bias-nm", args.cd_bias_nm[1]),
                    ("rotation-jitter-deg", args.rotation_jitter_deg), ("missing-fraction", args.missing_fraction),
                    ("detune-nm", args.detune_nm), ("bias-step-nm", args.bias_step_nm)):
        if not math.isfinite(v):
            raise MetalayError(f"command line: --{name} = {v!r}; allowed: a finite number")
    settings = ToleranceSettings(samples=args.samples, cd_bias_mean_nm=args.cd_bias_nm[0],
                                 cd_bias_sd_nm=args.cd_bias_nm[1], rotation_sd_deg=args.rotation_jitter_deg,
                                 missing_fraction=args.missing_fraction, detune_sd_nm=args.detune_nm,
                                 seed=args.seed, purity_threshold=args.purity_threshold,
                                 sweep_samples=args.sweep_samples, cd_response=args.cd_response,
                                 bias_harmonics=None if args.bias_harmonics is None else (args.bias_harmonics,) * 2,
                                 bias_step_nm=args.bias_step_nm)
    settings.validate(where="command line")
    from metalay.api import prepare_design

    design = prepare_design(load_design(args.design))[0]  # optimised multiplex encodings, as compile writes them
    out = args.output or Path("out") / f"{args.design.stem}-tolerance"
    res = tolerance_study(design, out, settings=settings, mask=args.mask, max_side=args.max_side,
                          workers=args.workers, show_progress=False if args.quiet or args.json else None,
                          make_plots=not args.no_plots, cell_cache=args.cell_cache)
    args.result = {"out_dir": str(out), "settings": dict(settings.__dict__), "nominal": res.nominal,
                   "statistics": res.statistics, "thresholds": res.thresholds, "notes": list(res.notes),
                   "files": {k: str(v) for k, v in sorted(res.files.items())}, "caution": SAFETY_NOTE}
    for note in res.notes:
        tell(args, f"note: {note}")
    if args.quiet or args.json:
        return 0
    for line in _tolerance_lines(settings, res):
        print(line)
    print(f"output folder: {out}")
    return 0


def run(args: argparse.Namespace) -> int:
    """Run ``compare`` or ``tolerance`` (chosen by the parser's ``study_command`` default)."""
    if args.study_command == "compare":
        return _run_compare(args)
    return _run_tolerance(args)
