"""Command-line faces of the design-rule checker and the mask summary: ``metalay rules check`` and ``metalay info``.

Only this module prints.  Exit codes: 0 clean, 1 rule violations, 2 bad input (rules file, options),
3 unreadable mask (:class:`metalay.errors.MaskReadError`).
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from metalay.cli._options import add_max_memory
from metalay.errors import MetalayError

__all__ = ["add_parser", "run", "add_info_parser", "run_info"]


def add_parser(subparsers) -> None:
    """Register ``rules`` with the sub-command ``check``."""
    p = subparsers.add_parser("rules", help="design-rule checks of GDSII/OASIS masks")
    sub = p.add_subparsers(dest="rules_command", required=True)
    c = sub.add_parser("check", help="check a mask against a rules file; exit 0 clean, 1 violations, 3 unreadable")
    c.add_argument("mask", help="mask file (.gds or .oas; format recognised from its first bytes)")
    c.add_argument("--rules", required=True,
                   help="rules file (TOML, format metalay.rules) or a bundled rules name, e.g. tio2-ebl-example")
    c.add_argument("-o", "--output", type=Path,
                   help="output folder for the JSON report and the marker GDSII (default: out/<mask stem>-rules)")
    c.add_argument("--cell", help="structure to check (default: every top structure)")
    c.add_argument("--method", choices=("auto", "tree", "lattice"), default="auto",
                   help="spacing search: lattice-neighbour stencil when applicable (auto), or always the STRtree")
    c.add_argument("--max-listed", type=int, default=100, help="violations listed per rule in the JSON (default 100)")
    c.add_argument("--marker-layer", type=int, default=1000,
                   help="GDSII layer of the violation markers; datatype = rule number (default 1000)")
    c.add_argument("--no-markers", action="store_true", help="do not write the marker GDSII")
    c.add_argument("--quiet", action="store_true", help="print only the verdict line")
    add_max_memory(c)
    c.set_defaults(func=run)


def run(args) -> int:
    """Run ``metalay rules check``; return the exit code."""
    try:
        return _run_check(args)
    except MetalayError as exc:
        print(f"metalay: error: {exc}", file=sys.stderr)
        return exc.exit_code


def _run_check(args) -> int:
    from metalay.checks.rules import RulesError, check_mask, load_rules, write_marker_gds
    from metalay.errors import MaskReadError, OutputError
    from metalay.io.gdsread import read_mask
    from metalay.util.atomic import atomic_write_text

    if args.max_listed < 0:
        raise RulesError(f"--max-listed = {args.max_listed} is invalid; allowed: >= 0")
    if not (0 <= args.marker_layer <= 65535):
        raise RulesError(f"--marker-layer = {args.marker_layer} is invalid; allowed: 0..65535")
    rules = load_rules(args.rules)
    mask = Path(args.mask)
    t0 = time.perf_counter()
    flat = read_mask(mask, layers=rules.layer_pairs(), cell=args.cell, max_memory_bytes=args.max_memory)
    t_read = time.perf_counter() - t0
    report = check_mask(flat, rules, method=args.method)
    out = args.output or Path("out") / f"{mask.stem}-rules"
    data = report.to_dict(max_listed=args.max_listed)
    from metalay.io.gdsread import file_sha256
    data["mask"] = str(mask)
    try:
        data["sha256"] = file_sha256(mask)
    except OSError as exc:
        raise MaskReadError(f"{mask}: cannot read ({exc.strerror or exc})") from exc
    data["rules_file"] = rules.source_path
    json_path = out / f"{mask.stem}.rules.json"
    try:
        atomic_write_text(json_path, json.dumps(data, sort_keys=True, indent=2) + "\n")
        marker_path = None
        if not args.no_markers:
            marker_path = out / f"{mask.stem}.markers.gds"
            write_marker_gds(report, flat, marker_path, marker_layer=args.marker_layer)
    except OSError as exc:
        raise OutputError(f"{out}: cannot write report ({exc})") from exc
    if not args.quiet:
        print(f"mask {mask} ({report.polygons} polygons on checked layers), rules {rules.name}")
        for line in report.summary_lines():
            print("  " + line)
        times = [("read", t_read)] + list(report.timings_s)
        print("time: " + ", ".join(f"{k} {v:.2f}s" for k, v in times))
        print(f"report: {json_path}")
        if marker_path is not None:
            print(f"markers: {marker_path} (layer {args.marker_layer}, datatype = rule number)")
    if report.clean:
        print("clean: no design-rule violations")
        return 0
    print(f"{report.total_violations} design-rule violations")
    return 1


def add_info_parser(subparsers) -> None:
    """Register ``info``: structures, layers, element counts, bbox, database unit, SHA-256 of a mask."""
    p = subparsers.add_parser("info", help="summarise a GDSII/OASIS mask (cells, layers, counts, bbox, units, sha256)")
    p.add_argument("mask", help="mask file (.gds or .oas)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    add_max_memory(p)
    p.set_defaults(func=run_info)


def run_info(args) -> int:
    """Run ``metalay info``; return the exit code."""
    from metalay.io.gdsread import mask_info

    try:
        info = mask_info(args.mask, max_memory_bytes=getattr(args, "max_memory", None))
    except MetalayError as exc:
        print(f"metalay: error: {exc}", file=sys.stderr)
        return exc.exit_code
    if getattr(args, "json", False):
        print(json.dumps(info, sort_keys=True, indent=2))
        return 0
    print(f"file        {info['path']} ({info['format']}, {info['size_bytes']} bytes)")
    print(f"sha256      {info['sha256']}")
    print(f"units       database unit {info['db_unit_m']:g} m, user unit {info['user_unit_m']:g} m")
    print(f"top cells   {', '.join(info['top_cells'])}")
    print(f"polygons    {info['polygons']} ({info['vertices']} vertices) after resolving references")
    if info["bbox_um"] is not None:
        b = info["bbox_um"]
        print(f"bbox        x {b[0]:.4f} .. {b[2]:.4f} um, y {b[1]:.4f} .. {b[3]:.4f} um")
    print("layers")
    for r in info["layers"]:
        print(f"  {r['layer']}/{r['datatype']}: {r['polygons']} polygons")
    print("cells")
    for c in info["cells"]:
        el = ", ".join(f"{k} {v}" for k, v in c["elements"].items()) or "empty"
        refs = f"; references {', '.join(c['references'])}" if c["references"] else ""
        print(f"  {c['name']}: {el}{refs}; {c['flattened_polygons']} polygons flattened")
    return 0
