"""``metalay optics``: optical check of a written mask (registered by :mod:`metalay.cli`)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from metalay.cli._options import add_max_memory
from metalay.errors import MetalayError

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> argparse.ArgumentParser:
    """Register the ``optics`` subcommand."""
    p = subparsers.add_parser(
        "optics", help="check the optics of a written mask (far field, OAM, efficiency, crosstalk, report)",
        description="Read a GDSII/OASIS mask, identify the element at every lattice site, build the near field "
                    "from the cell library's responses and compute the far field, power budget, OAM spectrum, "
                    "charge read from a simulated interferogram, channel crosstalk and lens metrics.")
    p.add_argument("mask", type=Path, help="mask file (.gds or .oas)")
    p.add_argument("--library", help="cell library: bundled name or path to *.library.json "
                                     "(default: the design's library)")
    p.add_argument("--design", type=Path, help="design file (.toml) the mask was compiled from: sets the target, "
                                               "lattice, aperture and input spin")
    p.add_argument("-o", "--output", type=Path, help="output folder (default out/<mask stem>-optics)")
    p.add_argument("--wavelength-nm", type=float, help="check wavelength (default: design, else library)")
    p.add_argument("--polarization", default="design",
                   help="input: design, spin+1, spin-1, linear-x, linear-y or linear:<angle_deg> (default design)")
    p.add_argument("--lit-from", choices=("substrate", "structures"), default=None,
                   help="side the light arrives from: through the substrate or onto the structures (default: the "
                        "design's design.lit_from, else the side the library was computed for)")
    p.add_argument("--bias-nm", type=float, default=None,
                   help="process bias per edge written into the mask (default: the design's, else 0)")
    p.add_argument("--bias-response", choices=("as-written", "nominal"), default=None,
                   help="responses of a biased mask: each cell at the size as written, solved by metalay's RCWA "
                        "when the library has no such cell ('as-written'), or 'nominal' (assume the process "
                        "removes the bias exactly); default: the design's checks.bias_response, else as-written")
    p.add_argument("--bias-harmonics", type=int, default=None, metavar="N",
                   help="truncation (orders per axis) of the biased-cell solves (default: the design's "
                        "checks.bias_harmonics, else the library's recorded truncation at each wavelength)")
    p.add_argument("--cell-cache", type=Path, default=None, metavar="DIR",
                   help="folder that keeps solved biased cells between runs (default: the design's "
                        "checks.cell_cache, else none)")
    p.add_argument("--size-tol-nm", type=float, default=3.0, help="size tolerance for matching library cells")
    p.add_argument("--unmatched", choices=("error", "nearest", "drop"), default="error",
                   help="elements matching no cell: stop, use the nearest cell, or leave the site empty")
    p.add_argument("--pad-factor", type=float, default=2.0, help="far-field zero padding (>= 1, default 2)")
    p.add_argument("--max-side", type=int, default=4096,
                   help="largest near-field grid side; larger masks are block-averaged (default 4096)")
    p.add_argument("--linear-scale", action="store_true", help="far-field image on a linear scale (default log)")
    p.add_argument("--no-plots", action="store_true", help="numbers only (no PNG figures, no HTML report)")
    p.add_argument("--fail-at", choices=("fail", "warn", "never"), default="fail",
                   help="exit 1 when the verdict is this or worse (default fail; never: always exit 0)")
    p.add_argument("--streamed", action="store_true",
                   help="streamed check (tile by tile: spot far fields, OAM, fringe reading, crosstalk and lens "
                        "figures from sums over sites, with stated error bounds or methods); automatic when the "
                        "whole-mask check does not fit --max-memory")
    add_max_memory(p)
    p.set_defaults(func=run)
    return p


def _check_range(name, value, lo, hi=None):
    if value is None:
        return
    if not (value >= lo) or (hi is not None and value > hi):
        rng = f">= {lo}" if hi is None else f"{lo}..{hi}"
        raise MetalayError(f"command line: --{name} = {value!r}; allowed {rng}")


def run(args) -> int:
    """Run the optical check; print a summary (the only printing happens here)."""
    from metalay.checks.optics import SAFETY_NOTE, OpticsOptions, check_optics
    from metalay.cli._output import detail
    from metalay.design.limits import verdict_at_least

    _check_range("pad-factor", args.pad_factor, 1.0, 8.0)
    _check_range("max-side", args.max_side, 64, 16384)
    _check_range("size-tol-nm", args.size_tol_nm, 0.0)
    _check_range("wavelength-nm", args.wavelength_nm, 100.0, 20000.0)
    _check_range("bias-harmonics", args.bias_harmonics, 0, 40)
    if not args.mask.is_file():
        raise MetalayError(f"{args.mask}: mask file not found")
    design = None
    if args.design is not None:
        from metalay.api import prepare_design
        from metalay.design.spec import load_design

        design = prepare_design(load_design(args.design))[0]  # the target as compile wrote it
    library = args.library or (design.library if design is not None else None)
    if library is None:
        raise MetalayError("command line: give --library (or --design, whose library is then used)")
    out = args.output or Path("out") / f"{args.mask.stem}-optics"
    from metalay.checks.steps import OPTICS_BYTES_PER_SITE, whole_mask_fits

    layer = design.mask.layer("structures") if design is not None else (1, 0)
    if args.streamed or not whole_mask_fits(args.mask, [layer], OPTICS_BYTES_PER_SITE, args.max_memory):
        return _run_streamed(args, library, design, out)
    options = OpticsOptions(wavelength_nm=args.wavelength_nm, polarization=args.polarization, bias_nm=args.bias_nm,
                            size_tol_nm=args.size_tol_nm, unmatched=args.unmatched, pad_factor=args.pad_factor,
                            max_side=args.max_side, make_plots=not args.no_plots,
                            log_far_field=not args.linear_scale, lit_from=args.lit_from,
                            max_memory_bytes=args.max_memory, bias_response=args.bias_response,
                            bias_harmonics=None if args.bias_harmonics is None else (args.bias_harmonics,) * 2,
                            cell_cache=None if args.cell_cache is None else str(args.cell_cache))
    res = check_optics(args.mask, library, design=design, out_dir=out, options=options)
    verdict = res.figures["verdicts"]["verdict"]
    args.result = {"out_dir": str(out), "figures": res.figures, "notes": list(res.notes),
                   "files": {k: v["path"] for k, v in sorted(res.files.items())}, "caution": SAFETY_NOTE}
    if not args.quiet and not args.json:
        f = res.figures
        if "spins" in f:  # a design with a phase per input spin: each spin against its own target
            for key, figs in f["spins"].items():
                print(f"input spin {key}:")
                _print_figures(figs, indent="  ")
            ct = f["target_crosstalk"]
            print("isolation from the other spin's target: " + ", ".join(
                f"spin {k} {ct['isolation_db'][k]:.2f} dB (ideal targets {ct['ideal_isolation_db'][k]:.2f} dB)"
                for k in ct["isolation_db"]))
        else:
            _print_figures(f)
        v = f["verdicts"]
        print(f"verdict: {v['verdict'].upper()} ({v['summary']})")
        if "optics_report.html" in res.files:
            print(f"report: {res.files['optics_report.html']['path']}")
        print(f"output folder: {out}")
    for note in res.notes:
        detail(args, f"note: {note}")
    detail(args, "time: " + ", ".join(f"{k[:-2]} {v:.2f} s" for k, v in res.timings.items()))
    if verdict_at_least(verdict, args.fail_at):
        print(f"metalay: optics verdict {verdict} (exit 1 at --fail-at {args.fail_at}): "
              f"{res.figures['verdicts']['summary']}", file=sys.stderr)
        return 1
    return 0


def _run_streamed(args, library, design, out: Path) -> int:
    """The streamed optical check (``--streamed``, or a mask beyond the memory budget): figures and the bound."""
    from metalay.checks.optics import SAFETY_NOTE
    from metalay.checks.optics_stream import check_optics_streamed, hash_in_background, write_streamed_outputs

    digest = hash_in_background(args.mask)
    res = check_optics_streamed(args.mask, library, design=design, polarization=args.polarization,
                                pad_factor=args.pad_factor, wavelength_nm=args.wavelength_nm, lit_from=args.lit_from,
                                bias_nm=args.bias_nm, size_tol_nm=args.size_tol_nm, unmatched=args.unmatched)
    from metalay.cli._output import detail
    from metalay.design.limits import verdict_at_least

    f, _ = write_streamed_outputs(res, args.mask, library, design, out, mask_sha256=digest())
    args.result = {"out_dir": str(out), "figures": f, "notes": list(res.notes), "caution": SAFETY_NOTE}
    if not args.quiet and not args.json:
        b = f["power_budget"]
        print(f"method: {f['method']} (block {f['block']['block_um']:.4g} um, order {f['block']['order']})")
        print(f"sites decoded: {f['decode']['sites']:,} (unmatched {f['decode']['unmatched']}, off-lattice "
              f"{f['decode']['off_lattice']})")
        print(f"power: converted {b['converted']:.4f}, leakage {b['leakage']:.4f} (fractions of incident)")
        if "designed_spot_efficiency" in f:
            print(f"designed spot: {f['designed_spot_efficiency']:.4f} of incident, +- "
                  f"{f['designed_spot_efficiency_bound']:.2g} (block-sum error bound)")
        _print_streamed_extras(f)
        v = f["verdicts"]
        print(f"verdict: {v['verdict'].upper()} ({v['summary']})")
        print(f"output folder: {out}")
    for note in res.notes:
        detail(args, f"note: {note}")
    verdict = f["verdicts"]["verdict"]
    if verdict_at_least(verdict, args.fail_at):
        print(f"metalay: optics verdict {verdict} (exit 1 at --fail-at {args.fail_at}): {f['verdicts']['summary']}",
              file=sys.stderr)
        return 1
    return 0


def _print_streamed_extras(f: dict) -> None:
    """OAM purity, fringe charge, channel isolation and Strehl ratio of the streamed check."""
    if "oam" in f:
        o = f["oam"]
        print(f"OAM purity of charge {o['design_charge']}: {o['purity']:.4f} +- {o['purity_bound']:.2g} "
              f"(within {o['radius_um']:.4g} um of the axis)")
    if "fringe_reading" in f:
        fr = f["fringe_reading"]
        read = fr["charge"] if fr["status"] == "read" else f"unreadable ({fr.get('reason', '')})"
        print(f"charge read from the simulated fork interferogram: {read} (design {fr['design_charge']}; blocks of "
              f"{fr['block_cells'][0]} x {fr['block_cells'][1]} cells)")
    if "crosstalk" in f and f["crosstalk"]["worst_isolation_db"] is not None:
        print(f"worst channel isolation: {f['crosstalk']['worst_isolation_db']:.2f} dB (exact site sums)")
    if "lens" in f:
        lens = f["lens"]
        bound = "unbounded" if lens["strehl_bound"] is None else f"{lens['strehl_bound']:.2g}"
        print(f"lens: Strehl {lens['strehl']:.4f} +- {bound}, FWHM {lens['fwhm_x_um']:.4g} x "
              f"{lens['fwhm_y_um']:.4g} um (Airy {lens['fwhm_airy_um']:.4g} um)")


def _print_figures(f: dict, *, indent: str = "") -> None:
    """The figures of one input polarisation, one line each."""
    b = f["power_budget"]
    print(f"{indent}illumination: {f['illumination']['in_words']} ({f['illumination']['chosen_by']})")
    print(f"{indent}sites decoded: {f['decode']['sites']:,} (unmatched {f['decode']['unmatched']}, off-lattice "
          f"{f['decode']['off_lattice']}, duplicates {f['decode']['duplicates']})")
    print(f"{indent}power: converted {b['converted']:.4f}, leakage {b['leakage']:.4f}, not in zeroth order "
          f"{b['not_in_zeroth_order']:.4f} (fractions of incident)")
    if "designed_spot_efficiency" in f:
        pos = f["designed_spot_position"]
        print(f"{indent}designed spot: {f['designed_spot_efficiency']:.4f} of incident at "
              f"{pos['deflection_deg']:.3f} deg")
    if "brightest_direction" in f:
        print(f"{indent}brightest far-field direction: {f['brightest_direction']['angle_deg']:.3f} deg")
    if "oam" in f:
        print(f"{indent}OAM purity of l = {f['oam']['design_charge']}: {f['oam']['purity']:.5f}")
    if "fringe_reading" in f:
        r = f["fringe_reading"]
        read = r["charge"] if r["status"] == "read" else "unreadable (the loops disagree)"
        print(f"{indent}charge read from the interferogram: {read} (design {r['design_charge']})")
    if "crosstalk" in f:
        ct = f["crosstalk"]
        print(f"{indent}worst channel isolation: {ct['worst_isolation_db']:.2f} dB, channel powers within "
              f"{ct['power_spread_db']:.2f} dB ({ct['method']})")
    if "lens" in f:
        lm = f["lens"]
        strehl = "n/a" if lm["strehl"] is None else f"{lm['strehl']:.4f}"
        print(f"{indent}focal spot FWHM {lm['fwhm_x_um']:.3f} x {lm['fwhm_y_um']:.3f} um (Airy "
              f"{lm['fwhm_airy_um']:.3f}), Strehl {strehl}, focusing efficiency {lm['focusing_efficiency']:.4f}")
