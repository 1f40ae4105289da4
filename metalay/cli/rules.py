"""Command-line faces of the design-rule checker and the mask summary: ``metalay rules check`` and ``metalay info``.

Only this module prints.  Exit codes: 0 clean, 1 rule violations, 2 bad input (rules file, options),
3 unreadable mask (:class:`metalay.errors.MaskReadError`).
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from metalay.cli._options import add_max_memory
from metalay.cli._output import detail, say

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
    c.add_argument("--quiet", action="store_true", help="print only the verdict line (standard output)")
    c.add_argument("--bands", type=int, default=0,
                   help="check band by band with this many bands (same report, memory bounded by a band); "
                        "default 0: the whole mask when it fits --max-memory, else bands sized from it")
    add_max_memory(c)
    c.set_defaults(func=run)


def run(args) -> int:
    """Run ``metalay rules check``; return the exit code (errors propagate to :func:`metalay.cli.main`)."""
    return _run_check(args)


def _run_check(args) -> int:
    from metalay.checks.rules import RulesError, check_mask, load_rules, write_marker_gds
    from metalay.checks.rules_stream import check_mask_tiled, involved_polygons
    from metalay.checks.steps import RULES_BYTES_PER_SITE, whole_mask_fits
    from metalay.errors import MaskReadError, OutputError
    from metalay.io.gdsread import read_mask
    from metalay.util.atomic import atomic_write_text

    if args.max_listed < 0:
        raise RulesError(f"--max-listed = {args.max_listed} is invalid; allowed: >= 0")
    if not (0 <= args.marker_layer <= 65535):
        raise RulesError(f"--marker-layer = {args.marker_layer} is invalid; allowed: 0..65535")
    if args.bands < 0:
        raise RulesError(f"--bands = {args.bands} is invalid; allowed: 0 (automatic) or a number of bands >= 1")
    rules = load_rules(args.rules)
    mask = Path(args.mask)
    t0 = time.perf_counter()
    tiled = args.bands > 0 or not whole_mask_fits(mask, rules.layer_pairs(), RULES_BYTES_PER_SITE, args.max_memory)
    if tiled:
        report, plan = check_mask_tiled(mask, rules, method=args.method, cell=args.cell,
                                        max_memory_bytes=args.max_memory, bands=args.bands or None)
        # the markers need only the polygons the report names (re-indexed to them)
        flat, marked = involved_polygons(mask, report, rules=rules, cell=args.cell) if not args.no_markers \
            else (None, report)
    else:
        flat = read_mask(mask, layers=rules.layer_pairs(), cell=args.cell, max_memory_bytes=args.max_memory)
    t_read = time.perf_counter() - t0
    if not tiled:
        report = marked = check_mask(flat, rules, method=args.method)
    out = args.output or Path("out") / f"{mask.stem}-rules"
    data = report.to_dict(max_listed=args.max_listed)
    from metalay.io.gdsread import file_sha256
    data["mask"] = str(mask)
    try:
        data["sha256"] = file_sha256(mask)
    except OSError as exc:
        raise MaskReadError(f"{mask}: cannot read ({exc.strerror or exc})") from exc
    data["rules_file"] = rules.source_path
    data["method"] = plan.as_dict(report.db_unit_nm) if tiled else {"method": "whole-mask"}
    json_path = out / f"{mask.stem}.rules.json"
    try:
        atomic_write_text(json_path, json.dumps(data, sort_keys=True, indent=2) + "\n")
        marker_path = None
        if not args.no_markers:
            marker_path = out / f"{mask.stem}.markers.gds"
            write_marker_gds(marked, flat, marker_path, marker_layer=args.marker_layer)
    except OSError as exc:
        raise OutputError(f"{out}: cannot write report ({exc})") from exc
    args.result = dict(data, report=str(json_path), markers=None if marker_path is None else str(marker_path))
    if not args.quiet and not getattr(args, "json", False):
        for line in rules_table(data):
            print(line)
        print(f"report: {json_path}")
        if marker_path is not None:
            print(f"markers: {marker_path} (layer {args.marker_layer}, datatype = rule number)")
    if tiled:
        say(args, f"checked in {plan.bands} bands of {plan.band_db * report.db_unit_nm / 1000:.4g} um with a "
                  f"{plan.halo_db * report.db_unit_nm / 1000:.4g} um halo ({plan.largest_band} polygons at most)")
    times = [("read", t_read)] + list(report.timings_s)
    detail(args, "time: " + ", ".join(f"{k} {v:.2f} s" for k, v in times))
    if report.clean:
        say_verdict(args, "clean: no design-rule violations")
        return 0
    say_verdict(args, f"{report.total_violations} design-rule violations")
    return 1


def say_verdict(args, line: str) -> None:
    """The verdict line: printed even with ``--quiet`` (it is the result), not with ``--json``."""
    if not getattr(args, "json", False):
        print(line)


def rules_table(data: dict) -> list[str]:
    """The rule report as an aligned table: layer, rule, limit with unit, checked, violations, worst and where."""
    head = ("layer", "rule", "limit", "unit", "checked", "violations", "worst", "worst at x, y (um)")
    rows = []
    for r in data["results"]:
        worst = "-" if r["worst_value"] is None else f"{r['worst_value']:.4g}"
        where = "-" if not r["worst_xy_um"] else f"{r['worst_xy_um'][0]:.3f}, {r['worst_xy_um'][1]:.3f}"
        count = f"{r['count']:,}" + ("+" if r.get("count_is_lower_bound") else "")
        rows.append((f"{r['layer']}/{r['datatype']}", r["rule"], f"{r['limit']:g}", r["unit"], f"{r['checked']:,}",
                     count, worst, where))
    widths = [max(len(h), *(len(row[k]) for row in rows)) if rows else len(h) for k, h in enumerate(head)]
    lines = [f"mask {data['mask']} ({data['polygons']:,} polygons on the checked layers), rules {data['rules']}",
             "  ".join(h.ljust(w) for h, w in zip(head, widths))]
    lines += ["  ".join(c.rjust(w) if k >= 4 or k == 2 else c.ljust(w) for k, (c, w) in enumerate(zip(row, widths)))
              for row in rows]
    return lines


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

    info = mask_info(args.mask, max_memory_bytes=getattr(args, "max_memory", None))
    args.result = info
    if getattr(args, "json", False):
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
