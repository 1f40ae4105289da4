"""``metalay sorter plan | compile | check``: log-polar OAM mode sorters as masks (registered by
:mod:`metalay.cli`).

* ``plan``: parameters (``a``, ``b``, element spacing ``f``, Fourier lens ``F``) for a wavelength, input aperture
  and spot spacing, the suggested aperture of each element; ``--write DIR`` writes the element design files.
* ``compile``: compiles every element file (:func:`metalay.api.compile_design`: mask, design rules, manifest),
  then checks the sorter from the written masks.
* ``check``: the two- (or four-) element optical check from given masks (``--mask`` per element) or from the
  ideal phase (``--ideal``).

Exit codes: 0 done (check within its thresholds); 1 the check failed a threshold (or design-rule violations with
``--fail-on-violations``); 2 bad input; 3 unreadable mask.
"""

from __future__ import annotations

import sys
from pathlib import Path

from metalay.errors import MetalayError

__all__ = ["add_parser", "run", "parse_charges"]


def parse_charges(text: str) -> list[int]:
    """``"-5..5"`` or ``"-3,-1,0,2"`` -> list of charges; one-line error otherwise."""
    t = str(text).strip()
    try:
        if ".." in t:
            lo, hi = (int(v) for v in t.split("..", 1))
            if hi < lo:
                raise ValueError
            return list(range(lo, hi + 1))
        return [int(v) for v in t.split(",")]
    except ValueError:
        raise MetalayError(f"command line: --charges = {text!r}; expected 'A..B' (A <= B) or a comma-separated list "
                           "of integers") from None


def _check_options(p) -> None:
    p.add_argument("--charges", default="-5..5",
                   help="input charges: --charges=A..B or --charges=-2,0,3 (default -5..5)")
    p.add_argument("--beam", choices=("ring", "lg"), default="ring",
                   help="input beam: a Gaussian ring mid-annulus (same for every l) or LG_0^l (default ring)")
    p.add_argument("--max-slope-error-pct", type=float, default=2.0,
                   help="largest deviation of the spacing per unit charge from lambda F / (2 pi a), %% (default 2)")
    p.add_argument("--max-position-error-spacings", type=float, default=0.1,
                   help="largest distance of a spot from its predicted position, in spacings (default 0.1)")
    p.add_argument("--min-own-window", type=float, default=0.5,
                   help="smallest fraction of each charge's detected power in its own window (default 0.5)")
    p.add_argument("--max-side", type=int, default=4096, help="largest propagation grid side (default 4096)")
    p.add_argument("--wave-plates", action="store_true",
                   help="assume a half-wave plate before any element written for the spin it does not receive")
    p.add_argument("--json", action="store_true", help="print the figures as JSON instead of the text summary")


def add_parser(subparsers) -> None:
    """Register ``metalay sorter ...``."""
    p = subparsers.add_parser("sorter", help="log-polar OAM mode sorter: plan the elements, compile them as masks, "
                                             "check them together (spot positions, spacing, crosstalk)")
    sub = p.add_subparsers(dest="sorter_action", required=True)
    q = sub.add_parser("plan", help="sorter parameters for a wavelength, input aperture and spot spacing; "
                                    "--write writes the element design files")
    q.add_argument("--wavelength-nm", type=float, required=True)
    q.add_argument("--input-diameter-um", type=float, required=True, help="outer diameter of the input annulus")
    q.add_argument("--spot-spacing-um", type=float, required=True, help="spot displacement per unit charge")
    q.add_argument("--inner-diameter-um", type=float, help="blocked centre (default input diameter / 5)")
    q.add_argument("--focal-length-mm", type=float, help="element spacing f (default: from --min-waves)")
    q.add_argument("--n-copies", type=int, help="fan-out copies (odd; 1 = none, 4 elements otherwise)")
    q.add_argument("--min-waves", type=float, help="smallest corrector amplitude in waves (default 4)")
    q.add_argument("--max-ray-angle-deg", type=float, help="largest ray angle of the mapping (default 15)")
    q.add_argument("--copier-angle-deg", type=float, help="angle of the side copies at the grating (default 1.7)")
    q.add_argument("--max-charge", type=int, default=5, help="largest |l| the copier's grating plane passes")
    q.add_argument("--write", type=Path, metavar="DIR", help="write the element design files into DIR")
    q.add_argument("--name", default="sorter", help="design name prefix of the written files (default sorter)")
    q.add_argument("--library", help="cell library of the written files (bundled name or *.library.json)")
    q.add_argument("--period-nm", type=float, help="lattice period (default: the library's)")
    q.add_argument("--lattice", choices=("square", "hexagonal"), default="square")
    q.add_argument("--input-spin", type=int, choices=(1, -1), default=1, help="spin arriving at element 1")
    q.add_argument("--json", action="store_true", help="print the plan as JSON")
    q.set_defaults(func=run)
    q = sub.add_parser("compile", help="compile every element file, then check the sorter from the written masks")
    q.add_argument("designs", nargs="+", type=Path, help="element design files, in the order the light meets them")
    q.add_argument("-o", "--output", type=Path, help="output folder (default out/<first file stem>-sorter)")
    q.add_argument("--fail-on-violations", action="store_true", help="exit 1 on design-rule violations")
    q.add_argument("--quiet", action="store_true", help="print nothing but errors")
    _check_options(q)
    q.set_defaults(func=run)
    q = sub.add_parser("check", help="two- or four-element optical check of written masks (or --ideal)")
    q.add_argument("designs", nargs="+", type=Path, help="element design files, in order")
    q.add_argument("--mask", action="append", type=Path, help="written mask of each element, in order (repeat)")
    q.add_argument("--ideal", action="store_true", help="check the ideal phase elements instead of written masks")
    q.add_argument("-o", "--output", type=Path, help="output folder (default out/<first file stem>-sorter-check)")
    q.add_argument("--quiet", action="store_true", help="print nothing but errors")
    _check_options(q)
    q.set_defaults(func=run)


def _range(name: str, value, lo, hi):
    if value is None or not (lo <= value <= hi):
        raise MetalayError(f"command line: --{name} = {value!r}; allowed {lo}..{hi}")


def _thresholds(args):
    from metalay.measure.sortermask import SorterThresholds

    _range("max-slope-error-pct", args.max_slope_error_pct, 0.0, 100.0)
    _range("max-position-error-spacings", args.max_position_error_spacings, 0.0, 10.0)
    _range("min-own-window", args.min_own_window, 0.0, 1.0)
    _range("max-side", args.max_side, 64, 16384)
    return SorterThresholds(args.max_slope_error_pct, args.max_position_error_spacings, args.min_own_window)


def _run_plan(args) -> int:
    from metalay.measure.sorterplan import plan_sorter, write_element_designs

    keys = {"input_diameter_um": args.input_diameter_um, "inner_diameter_um": args.inner_diameter_um,
            "spot_spacing_um": args.spot_spacing_um, "focal_length_mm": args.focal_length_mm,
            "n_copies": args.n_copies, "min_waves": args.min_waves, "max_ray_angle_deg": args.max_ray_angle_deg,
            "copier_angle_deg": args.copier_angle_deg}
    plan = plan_sorter(keys, wavelength_nm=args.wavelength_nm, max_charge=args.max_charge)
    written = []
    if args.write is not None:
        if not args.library:
            raise MetalayError("command line: --write needs --library (the cell library of the element files)")
        period = args.period_nm
        if period is None:
            from metalay.cells.library import load_library

            period = load_library(args.library).period_nm
        written = write_element_designs(plan, args.write, name=args.name, library=args.library, period_nm=period,
                                        lattice=args.lattice, input_spin=args.input_spin)
    summary = plan.summary()
    args.result = dict(summary, written=[str(p) for p in written])
    if args.json:
        return 0
    print(f"sorter for {summary['wavelength_nm']:g} nm: a = {summary['a_um']:.4f} um, b = {summary['b_um']:.4f} um, "
          f"element spacing f = {summary['element_spacing_f_mm']:g} mm, Fourier lens F = "
          f"{summary['fourier_focal_length_F_mm']:.4f} mm, corrector {summary['corrector_waves']:.2f} waves")
    print(f"spot spacing {summary['spot_spacing_um']:g} um per unit charge, l > 0 towards "
          f"{'+y' if summary['spot_sign'] > 0 else '-y'}; largest local frequency "
          f"{summary['max_local_frequency_per_um']:.4f} cycles/um (sampling limit 1 / (2 nu): lattice period below "
          f"{1e3 / (2 * summary['max_local_frequency_per_um']):.0f} nm; a quarter of it keeps 4 cells per 2 pi)")
    if summary["n_copies"] > 1:
        print(f"{summary['n_copies']} copies: copier focal length f_c = {summary['copier_focal_length_mm']:g} mm")
    for e in summary["elements"]:
        ap = ", ".join(f"{k} = {v}" for k, v in e["aperture"].items())
        print(f"  element {e['element']}: {e['role']}; aperture {ap}")
    for path in written:
        print(f"wrote {path}")
    return 0


def _print_report(rep, out, quiet: bool) -> None:
    if quiet:
        return
    f = rep.figures
    s = f["setup"]
    print(f"sorter: {2 if s['n_copies'] == 1 else 4} elements, "
          f"{s['wavelength_nm']:g} nm, a {s['a_um']:.3f} um, b {s['b_um']:.3f} um, f {s['element_spacing_f_mm']:g} "
          f"mm, F {s['fourier_focal_length_F_mm']:.4g} mm, corrector {s['corrector_waves']:.2f} waves")
    print(f"elements from: {rep.elements_from}")
    for e in f["elements"]:
        pe = e["written_phase_error_deg"]
        print(f"  {e['mask']}: {e['sites']:,} elements, written for spin {e['input_spin']:+d}, receives "
              f"{e['arriving_spin']:+d}, converted power "
              f"{e['converted_power_per_element']:.4f}, written phase error rms {pe['rms']:.3f} deg")
    print("   l  position_um  predicted_um  error_spacings  own_window  detected")
    for k, lc in enumerate(f["charges"]):
        print(f"{lc:4d}  {f['positions_um'][k]:11.3f}  {f['predicted_um'][k]:12.3f}  "
              f"{f['position_error_spacings'][k]:14.4f}  {f['own_window_fraction'][k]:10.3f}  "
              f"{f['detected_fraction_of_input'][k]:8.3f}")
    print(f"spacing per unit charge {f['slope_um_per_charge']:.4f} um (lambda F / (2 pi a) = "
          f"{f['predicted_slope_um_per_charge']:.4f} um, {f['slope_error_pct']:+.3f} %)")
    v = f["verdict"]
    print(f"verdict: {v['status']}" + "".join(f"\n  failed: {line}" for line in v["failed"]))
    for note in rep.notes:
        print(f"note: {note}", file=sys.stderr)
    print(f"output folder: {out}")


def _run_check(args, designs, masks, out) -> int:
    from metalay.measure.sortermask import SORTER_SAFETY_NOTE, check_sorter, write_sorter_report

    th = _thresholds(args)
    rep = check_sorter(designs, masks, charges=parse_charges(args.charges), beam=args.beam, thresholds=th,
                       max_side=args.max_side, wave_plates=args.wave_plates)
    files = write_sorter_report(rep, out)
    args.result = dict(rep.figures, notes=list(rep.notes), files=sorted(files), caution=SORTER_SAFETY_NOTE,
                       out_dir=str(out))
    if not args.json:
        _print_report(rep, out, args.quiet)
    return 0 if rep.status == "pass" else 1


def run(args) -> int:
    """Run one ``sorter`` action; returns the exit code."""
    from metalay.design.spec import load_design

    if args.sorter_action == "plan":
        return _run_plan(args)
    parse_charges(args.charges)
    _thresholds(args)
    designs = [load_design(p) for p in args.designs]
    from metalay.measure.sortermask import sorter_setup

    sorter_setup(designs)
    stem = args.designs[0].stem
    if args.sorter_action == "check":
        if args.ideal == bool(args.mask):
            raise MetalayError("command line: give --mask once per element (the written masks, in order) or "
                               "--ideal, not both")
        if args.mask and len(args.mask) != len(designs):
            raise MetalayError(f"command line: {len(args.mask)} --mask for {len(designs)} element files; give one "
                               "per element, in order")
        return _run_check(args, designs, None if args.ideal else args.mask, args.output or
                          Path("out") / f"{stem}-sorter-check")
    from metalay.api import compile_design

    out = args.output or Path("out") / f"{stem}-sorter"
    masks, violations = [], 0
    for design in designs:  # 2 or 4 elements, each through the normal compile
        res = compile_design(design, out / design.name, show_progress=False if args.quiet else None)
        fmt = "gds" if "gds" in res.files else "oas"
        masks.append(res.files[fmt])
        violations += int(res.manifest["checks"].get("rules", {}).get("violations", 0) or 0)
        if not args.quiet and not args.json:
            print("\n".join(line for line in res.summary if line.startswith(("design ", "worst", "wrote"))))
            print(f"  rules: {res.manifest['checks'].get('rules', {}).get('status', 'not run')}; folder "
                  f"{res.out_dir}")
    code = _run_check(args, designs, masks, out / "check")
    if violations and args.fail_on_violations:
        print(f"metalay: {violations} design-rule violations (see the element manifests)", file=sys.stderr)
        return 1
    return code
