"""``metalay charge read | aperture | simulate``: the topological charge from camera images, the triangular
aperture mask, and invented test images (registered by :mod:`metalay.cli`).

* ``read IMAGE --method fork|spiral|triangle`` + the set-up the sign needs (``--reference-azimuth-deg``,
  ``--reference``, ``--apex-deg``): prints charge, status, method and reason (``--json``: one JSON object).
  Exit codes: 0 the charge was read; 1 unreadable (the evidence disagrees or is missing: no charge is given);
  2 bad input (options, a missing or undecodable image); 70 internal error.
* ``aperture [SPEC.toml] -o DIR``: the triangular aperture as GDSII/OASIS on its own layer with a manifest
  (:func:`metalay.measure.aperture.write_triangle_aperture`). Exit codes 0, 2.
* ``simulate --method ... --charge L -o IMAGE``: an invented camera image of one scene, to try a set-up.
"""

from __future__ import annotations

import argparse
import re
from pathlib import Path

from metalay.errors import MetalayError

__all__ = ["add_parser", "run"]

_SETUP_OPTIONS = {"fork": "reference_azimuth_deg", "spiral": "reference", "triangle": "apex_deg"}
_SETUP_HELP = {
    "reference_azimuth_deg": "direction the reference beam is tilted towards, degrees from +x (image right) "
                             "towards +y (image top), -360..360",
    "reference": "curvature of the reference at the camera: diverging or converging",
    "apex_deg": "direction of one vertex of the aperture triangle as seen on the camera, degrees from +x (image "
                "right) towards +y (image top), -360..360"}


def _setup_arguments(q) -> None:
    q.add_argument("--method", choices=tuple(_SETUP_OPTIONS), required=True,
                   help="fork or spiral interferogram, or the far field behind a triangular aperture")
    q.add_argument("--reference-azimuth-deg", type=float, help="fork: " + _SETUP_HELP["reference_azimuth_deg"])
    q.add_argument("--reference", choices=("diverging", "converging"), help="spiral: " + _SETUP_HELP["reference"])
    q.add_argument("--apex-deg", type=float, help="triangle: " + _SETUP_HELP["apex_deg"])


def add_parser(subparsers) -> None:
    """Register ``metalay charge ...``."""
    p = subparsers.add_parser("charge", help="topological charge from a camera image (fork, spiral, triangular "
                                             "aperture); the triangular aperture mask; invented test images")
    sub = p.add_subparsers(dest="charge_action", required=True)
    q = sub.add_parser("read", help="read the charge from a PNG/TIFF image (8/16 bit)",
                       description="Exit codes: 0 read, 1 unreadable (evidence disagrees; no charge), 2 bad input.")
    q.add_argument("image", type=Path, help="camera image (PNG or TIFF, 8 or 16 bit; row 0 = top = +y)")
    _setup_arguments(q)
    q.add_argument("--mirror", choices=("none", "x", "y"), default="none",
                   help="undo one mirror between beam and camera: x flips columns, y flips rows (default none)")
    q.add_argument("--max-pixels", type=int, default=60_000_000, help="largest image accepted (pixels)")
    q.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    q.set_defaults(func=run)
    q = sub.add_parser("aperture", help="triangular aperture (GDSII/OASIS, own layer) for a beam, with a manifest")
    q.add_argument("spec", nargs="?", type=Path, help="spec file (TOML with a [triangle_aperture] table); or "
                                                      "give the options below")
    q.add_argument("-o", "--output", type=Path, help="output folder (default out/<name>)")
    q.add_argument("--name", help="cell and file name (default triangle)")
    q.add_argument("--ring-diameter-um", type=float, help="diameter of the beam's bright ring at the aperture")
    q.add_argument("--side-um", type=float, help="side of the triangle (instead of --ring-diameter-um)")
    q.add_argument("--apex-deg", type=float, help="vertex direction in the mask's top view (default 90)")
    q.add_argument("--center-um", type=float, nargs=2, metavar=("X", "Y"), help="centroid (default 0 0)")
    q.add_argument("--db-unit-nm", type=float, help="database unit (default 1)")
    q.add_argument("--layer", type=int, nargs=2, metavar=("LAYER", "DATATYPE"), help="default 30 0")
    q.add_argument("--formats", help="comma-separated: gds,oas (default both)")
    q.add_argument("--quiet", action="store_true", help="print nothing but errors")
    q.set_defaults(func=run)
    q = sub.add_parser("simulate", help="write an invented camera image of a fork, spiral or triangle scene")
    _setup_arguments(q)
    q.add_argument("--charge", type=int, required=True, help="topological charge, -15..15")
    q.add_argument("-o", "--output", type=Path, required=True, help="image file to write (.png or .tif/.tiff)")
    q.add_argument("--size-px", type=int, default=384, help="image side, 64..2048 (default 384)")
    q.add_argument("--bits", type=int, choices=(8, 16), default=8)
    q.add_argument("--seed", type=int, default=0, help="noise seed (same seed, same bytes)")
    q.set_defaults(func=run)


def _setup_value(args):
    """The set-up value of the chosen method; refuses a missing one and options of other methods."""
    need = _SETUP_OPTIONS[args.method]
    for method, key in _SETUP_OPTIONS.items():
        given = getattr(args, key) is not None
        opt = "--" + key.replace("_", "-")
        if key == need and not given:
            raise MetalayError(f"command line: --method {args.method} needs {opt} ({_SETUP_HELP[key]})")
        if key != need and given:
            raise MetalayError(f"command line: {opt} applies to --method {method} only")
    value = getattr(args, need)
    if need != "reference" and not (-360.0 <= value <= 360.0):
        raise MetalayError(f"command line: --{need.replace('_', '-')} = {value!r}; allowed -360..360")
    return value


def _run_read(args) -> int:
    from metalay.measure.aperture import APERTURE_SAFETY_NOTE
    from metalay.measure.imagecharge import read_charge_file

    setup = _setup_value(args)
    if not 1 <= args.max_pixels <= 1_000_000_000:
        raise MetalayError(f"command line: --max-pixels = {args.max_pixels}; allowed 1..1000000000")
    reading, info = read_charge_file(args.image, method=args.method, setup=setup, mirror=args.mirror,
                                     max_pixels=args.max_pixels)
    from metalay.checks.optics import json_ready

    if args.json:
        out = {"file": str(args.image), "image": info, "method": reading.method, "charge": reading.charge,
               "status": reading.status, "reason": reading.reason, "center_px": list(reading.center_px),
               "setup": {_SETUP_OPTIONS[args.method]: setup}, "evidence": reading.evidence,
               "exit_code": 0 if reading.status == "ok" else 1, "caution": APERTURE_SAFETY_NOTE}
        args.result = json_ready(out)
    else:
        charge = "none" if reading.charge is None else f"{reading.charge:+d}"
        print(f"charge: {charge}")
        print(f"status: {reading.status}")
        print(f"method: {reading.method} ({_SETUP_OPTIONS[args.method]} = {setup})")
        print(f"reason: {reading.reason or '-'}")
        print(f"centre: column {reading.center_px[0]:.1f}, row {reading.center_px[1]:.1f} (image pixels, row 0 = "
              f"top); image {info['cols']} x {info['rows']}, counts {info['min']:g}..{info['max']:g}")
    return 0 if reading.status == "ok" else 1


def _aperture_table(args) -> dict:
    """A ``[triangle_aperture]`` table from the command-line options (validated like a spec file)."""
    t = {"name": args.name or "triangle"}
    for key in ("ring_diameter_um", "side_um", "apex_deg", "db_unit_nm"):
        if getattr(args, key) is not None:
            t[key] = getattr(args, key)
    if args.center_um is not None:
        t["center_um"] = list(args.center_um)
    if args.layer is not None:
        t["layer"] = list(args.layer)
    if args.formats is not None:
        t["formats"] = [f.strip() for f in args.formats.split(",")]
    return {"triangle_aperture": t}


def _run_aperture(args) -> int:
    from metalay.measure.aperture import (
        load_triangle_spec,
        parse_triangle_spec,
        write_triangle_aperture,
    )

    options = ("name", "ring_diameter_um", "side_um", "apex_deg", "center_um", "db_unit_nm", "layer", "formats")
    if args.spec is not None:
        given = [o for o in options if getattr(args, o) is not None]
        if given:
            raise MetalayError(f"command line: --{given[0].replace('_', '-')} cannot be combined with a spec file "
                               f"({args.spec}); put it in its [triangle_aperture] table")
        spec = load_triangle_spec(args.spec)
    else:
        try:
            spec = parse_triangle_spec(_aperture_table(args), "command line")
        except MetalayError as exc:  # name the option, not the spec file's key
            msg = re.sub(r"'triangle_aperture\.(\w+)'", lambda m: "--" + m.group(1).replace("_", "-"), str(exc))
            raise MetalayError(msg.replace("key --", "option --")) from exc
    out = args.output or Path("out") / spec.name
    m = write_triangle_aperture(spec, out)
    args.result = dict(m, out_dir=str(out))
    if not args.quiet:
        a = m["aperture"]
        print(f"triangular aperture {spec.name}: side {a['side_um']:.4f} um, apex {a['apex_deg']:g} deg, centroid "
              f"({a['center_um'][0]:g}, {a['center_um'][1]:g}) um, layer {a['layer']}/{a['datatype']}, area "
              f"{a['area_um2']:.2f} um^2, snapping {a['snap_error_nm']:.3f} nm")
        for name, f in sorted(m["files"].items()):
            print(f"wrote {name} ({f['bytes']} bytes, sha256 {f['sha256'][:12]}), read back: "
                  f"{'identical' if m['readback'][name]['vertices_equal'] else 'DIFFERENT'}")
        print(f"read the far field with: {m['reading']['command']}")
        print(f"output folder: {out}")
    return 0


def _run_simulate(args) -> int:
    from metalay.measure.camerasim import simulate_image
    from metalay.util.atomic import atomic_write_bytes, ensure_dir

    setup = _setup_value(args)
    suffix = args.output.suffix.lower()
    if suffix not in (".png", ".tif", ".tiff"):
        raise MetalayError(f"command line: -o {args.output}: the file name must end in .png, .tif or .tiff")
    data = simulate_image(args.method, args.charge, setup=setup, size_px=args.size_px, bits=args.bits,
                          fmt="png" if suffix == ".png" else "tiff", seed=args.seed)
    ensure_dir(args.output.parent if str(args.output.parent) else Path("."))
    atomic_write_bytes(args.output, data)
    opt = "--" + _SETUP_OPTIONS[args.method].replace("_", "-")
    print(f"wrote {args.output} (an invented {args.method} scene, charge {args.charge:+d}, {args.bits}-bit)")
    print(f"read it with: metalay charge read {args.output} --method {args.method} {opt} {setup}")
    return 0


def run(args: argparse.Namespace) -> int:
    """Run one ``charge`` action; returns the exit code."""
    if args.charge_action == "read":
        return _run_read(args)
    if args.charge_action == "aperture":
        return _run_aperture(args)
    return _run_simulate(args)
