"""``metalay cells``: build cell libraries with the RCWA solver, show them, import responses from elsewhere.

Registered by :mod:`metalay.cli` through ``add_parser(subparsers)`` and ``run(args) -> int``.
"""

from __future__ import annotations

import sys
from pathlib import Path

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    """Register ``cells build|show|import|complement|rotation-check``."""
    p = subparsers.add_parser("cells", help="unit-cell libraries: build with the RCWA solver, show, import")
    sub = p.add_subparsers(dest="cells_command", required=True)

    b = sub.add_parser("build", help="sweep a cell kind with the RCWA solver and write a library")
    b.add_argument("spec", type=Path, help="build spec (.toml), e.g. libraries/specs/tio2-nanofin-532.toml")
    b.add_argument("-o", "--output", type=Path,
                   help="output folder (default: the folder above the spec's 'specs' folder, else the spec's folder)")
    b.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    b.set_defaults(func=run)

    s = sub.add_parser("show", help="print a library's responses and plot them (PNG)")
    s.add_argument("library", help="bundled library name or path to <name>.library.json")
    s.add_argument("--png", type=Path, help="PNG path (default out/cells/<name>.png)")
    s.add_argument("--no-plot", action="store_true", help="print only")
    s.set_defaults(func=run)

    i = sub.add_parser("import", help="turn responses simulated elsewhere (CSV) into a library; --template DIR "
                                      "writes a filled-in metadata example and the responses file to fill")
    i.add_argument("table", type=Path, nargs="?", help="CSV: cell_id,wavelength_nm,t_long_re,t_long_im,t_short_re,"
                   "t_short_im,power_long,power_short (libraries/FORMAT.md)")
    i.add_argument("--meta", type=Path, help="TOML with [library], [stack], [rules], [[cells]] "
                                             "(libraries/FORMAT.md; --template writes an example)")
    i.add_argument("--template", type=Path, metavar="DIR",
                   help="write DIR/meta.toml (a filled-in example) and DIR/responses.csv (header) and stop")
    i.add_argument("-o", "--output", type=Path, default=Path("."), help="output folder (default: current folder)")
    i.set_defaults(func=run)

    c = sub.add_parser("complement", help="estimate a slot (aperture) library from an antenna library by "
                       "Babinet's principle (labelled as an estimate; prefer a solver-built slot library)")
    c.add_argument("library", help="antenna library (bundled name or path to <name>.library.json)")
    c.add_argument("--name", help="name of the new library (default: <antenna name>-babinet-slots)")
    c.add_argument("-o", "--output", type=Path, default=Path("out") / "cells", help="output folder (default out/cells)")
    c.set_defaults(func=run)

    r = sub.add_parser("rotation-check", help="solve rotated cells directly and store the rotation model's error "
                       "in the library file")
    r.add_argument("library", help="bundled library name or path to <name>.library.json")
    r.add_argument("--angles", type=float, nargs="+", default=[15.0, 30.0, 45.0],
                   help="rotations in degrees, each in (0, 90] (default 15 30 45)")
    r.add_argument("--wavelength-nm", type=float, help="default: the library's design wavelength")
    r.add_argument("--max-harmonics", type=int, default=12,
                   help="largest truncation the convergence target may reach (default 12)")
    r.add_argument("-o", "--output", type=Path,
                   help="folder for the updated library (default: the library's own folder)")
    r.set_defaults(func=run)


def _default_out(spec: Path) -> Path:
    parent = spec.resolve().parent
    return parent.parent if parent.name == "specs" else parent


def run(args) -> int:
    """Run one ``cells`` subcommand; returns the exit code (MetalayError propagates to metalay.cli)."""
    handler = _HANDLERS.get(args.cells_command)
    if handler is None:
        print(f"metalay cells: unknown subcommand {args.cells_command!r}", file=sys.stderr)
        return 2  # unreachable: argparse allows only the subcommands above
    return handler(args)


def _save(args, lib, out, **result) -> int:
    """Write ``lib`` into ``out``, keep the result object (library, files and ``result``) and list the files."""
    from metalay.cells.library import save_library

    written = save_library(lib, out)
    args.result = {"library": lib.name, **result, "files": [str(p) for p in written]}
    for path in written:
        print(f"wrote {path}")
    return 0


def _build(args) -> int:
    """``metalay cells build``."""
    from metalay.cells.cellbuild import build_library, load_build_spec
    from metalay.cells.library import save_library
    from metalay.util.progress import progress

    spec = load_build_spec(args.spec)
    bars = []

    def factory(total):
        bar = progress(total=total, desc=f"sweep {spec.name}", enabled=False if args.quiet else None,
                       unit="cell")
        bars.append(bar)
        return bar.update

    lib, sw = build_library(spec, progress=factory)
    for bar in bars:
        bar.close()
    written = save_library(lib, args.output or _default_out(args.spec))
    args.result = {"library": lib.name, "files": [str(p) for p in written],
                   "convergence": {k: v for k, v in lib.provenance["solver"]["convergence"].items()
                                   if k != "points"}}
    if not args.quiet and not args.json:
        print(lib.provenance["notes"])
        so = lib.provenance["solver"]
        conv = so["convergence"]
        hs = sorted({(p["harmonics_x"], p["harmonics_y"]) for p in conv["points"]})
        print(f"sweep truncation ({so['sweep_harmonics_x']}, {so['sweep_harmonics_y']}) from the "
              f"{so['sweep_harmonics_source']}; band points converged with truncations {hs}: largest change "
              f"{conv['max_change_abs_t']:.1e} in |t|, {conv['max_change_phase_deg']:.2f} deg in phase "
              f"(targets {conv['tolerance_abs_t']:g}, {conv['tolerance_phase_deg']:g} deg; "
              f"{'all points converged' if conv['all_converged'] else 'NOT all points converged: see the file'})")
        for path in written:
            print(f"wrote {path}")
    return 0


def _show(args) -> int:
    """``metalay cells show``."""

    from metalay.cells.cellbuild import library_table, plot_library
    from metalay.cells.library import load_library

    lib = load_library(args.library)
    args.result = {"library": lib.name, "mode": lib.mode, "phase_mechanism": lib.phase_mechanism,
                   "design_wavelength_nm": lib.design_wavelength_nm, "period_nm": lib.period_nm,
                   "cells": [{"id": c.id, "kind": c.kind, **dict(c.dims_nm)} for c in lib.cells],
                   "responses": library_table(lib) if lib.has_responses else []}
    print(f"{lib.name}: {lib.mode}, {lib.phase_mechanism} phase, design {lib.design_wavelength_nm:g} nm, "
          f"period {lib.period_nm:g} nm, {len(lib.cells)} cell(s)")
    print(f"responses: {lib.provenance.get('responses_source')}")
    for cell in lib.cells:
        dims = ", ".join(f"{k} = {v:g}" for k, v in cell.dims_nm)
        print(f"cell {cell.id}: {cell.kind}, {dims}")
    if not lib.has_responses:
        print("no responses (geometry only)")
        return 0
    word = "r" if lib.mode == "reflection" else "t"
    print(f"{'cell':>16} {'wl_nm':>8} {'|'+word+'_long|':>9} {'|'+word+'_short|':>10} {'dphase_deg':>10} "
          f"{'conversion':>10} {'leakage':>8}")
    for row in library_table(lib):
        print(f"{row['cell_id']:>16} {row['wavelength_nm']:8.2f} {row['abs_t_long']:9.4f} "
              f"{row['abs_t_short']:10.4f} {row['phase_difference_deg']:10.2f} {row['conversion']:10.4f} "
              f"{row['leakage']:8.4f}")
    spin = lib.extra.get("spin_decoupled")
    if isinstance(spin, dict):
        print(f"spin-decoupled set at {spin['wavelength_nm']:g} nm: {spin['levels']} levels of the conversion "
              f"phase from {spin['level_offset_deg']:g} deg; amplitude spread {spin['amplitude_spread']:.4f}, "
              f"worst retardance error {spin['worst_retardance_error_deg']:.2f} deg (tolerance "
              f"{spin['retardance_tolerance_deg']:g}), worst level phase error "
              f"{spin['worst_level_phase_error_deg']:.2f} deg")
        for c in spin["cells"]:
            print(f"  {c['cell_id']}: conversion phase {c['conversion_phase_deg']:8.2f} deg, retardance error "
                  f"{c['retardance_error_deg']:+6.2f} deg, conversion {c['conversion_efficiency']:.4f}, amplitude "
                  f"{100 * c['amplitude_deviation']:+.2f} % of the mean, levels {c['levels']}")
    if not args.no_plot:
        png = args.png or Path("out") / "cells" / f"{lib.name}.png"
        written = plot_library(lib, png)
        args.result["files"] = [str(written)]
        print(f"wrote {written}")
    return 0


def _import(args) -> int:
    """``metalay cells import``."""
    from metalay.cells.cellbuild import import_responses, import_template
    from metalay.errors import CellBuildError

    if args.template is not None:
        if args.table is not None or args.meta is not None:
            raise CellBuildError("command line: --template writes the example files; give it alone (no table, "
                                 "no --meta)")
        meta, table = import_template(args.template)
        args.result = {"meta": str(meta), "responses": str(table)}
        print(f"wrote {meta} (a filled-in example: replace the values) and {table} (header only: add your rows)")
        print(f"then: metalay cells import {table} --meta {meta} -o DIR")
        return 0
    if args.table is None or args.meta is None:
        raise CellBuildError("command line: give the responses table and --meta (or --template DIR for an "
                             "example of both)")
    return _save(args, import_responses(args.table, args.meta), args.output)


def _complement(args) -> int:
    """``metalay cells complement``."""
    from metalay.cells.library import load_library
    from metalay.mask.process import babinet_slot_library

    lib = babinet_slot_library(load_library(args.library), name=args.name)
    print(f"{lib.name}: Babinet-principle estimate, not a solver result ({lib.provenance.get('responses_source')})")
    return _save(args, lib, args.output)


def _rotation_check(args) -> int:
    """``metalay cells rotation-check``."""
    from dataclasses import replace

    from metalay.cells.cellbuild import rotation_check
    from metalay.cells.library import load_library

    lib = load_library(args.library)
    if not 1 <= args.max_harmonics <= 40:
        print(f"metalay: error: --max-harmonics = {args.max_harmonics} outside 1..40", file=sys.stderr)
        return 2
    rec = rotation_check(lib, args.angles, wavelength_nm=args.wavelength_nm, max_harmonics=args.max_harmonics)
    for cell in rec["cells"]:
        if cell["rotation_invariant"]:
            print(f"{cell['cell_id']}: rotation invariant, nothing to check")
            continue
        print(f"{cell['cell_id']} at {rec['wavelength_nm']:g} nm:")
        for a in cell["angles"]:
            print(f"  {a['angle_deg']:7.3f} deg ({a['method']}, truncation ({a['harmonics_x']}, "
                  f"{a['harmonics_y']}){'' if a['converged'] else ', NOT converged'}): phase step spin +1 "
                  f"{a['phase_step_spin_plus_deg']:+7.2f} deg, spin -1 {a['phase_step_spin_minus_deg']:+7.2f} deg "
                  f"(model +-{2 * a['angle_deg']:.2f}); conversion {a['conversion_direct']:.4f} direct vs "
                  f"{a['conversion_model']:.4f} model")
    out = args.output or Path(lib.source_path).parent
    return _save(args, replace(lib, extra={**lib.extra, "rotation_check": rec}), out, rotation_check=rec)


_HANDLERS = {"build": _build, "show": _show, "import": _import, "complement": _complement,
             "rotation-check": _rotation_check}

