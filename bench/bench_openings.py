"""Benchmark: decoding a complement-tone mask (openings from the written film pieces) against the structure decoder.

The design is ``examples/axicon-slots-1550.toml`` (slots in a gold film at 1550 nm, 600 nm period) with the
aperture set by ``--diameter-um`` (300 um: about 1.95e5 sites). It is compiled twice, in complement tone and in
structures tone (GDSII only, checks off), then each mask is read and decoded in its own process so that peak
memories are separate: the structure decoder (:func:`metalay.checks.decode.decode_sites`) is one baseline, the
obvious route for the openings (per band, the region minus the union of its pieces) the other; the opening decoder
(:func:`metalay.checks.openings.decode_openings`) is measured against both, and the decoded site tables of the two
tones are compared (same sites, rotation difference).

Usage::

    .venv/bin/python bench/bench_openings.py [--diameter-um 300] [--rows 64] [--no-naive]

Not collected by pytest.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _naive_openings(flat, design) -> int:
    """The obvious route, for comparison: per band, the union of its pieces subtracted from the region (no strips).

    Returns the number of opening parts found (openings split only by band edges).
    """
    import numpy as np
    import shapely

    from metalay.mask.process import complement_layout

    layout = complement_layout(design)
    counts = np.diff(flat.start)
    polys = shapely.polygons(shapely.linearrings(flat.xy_db.astype(float), indices=np.repeat(np.arange(flat.count),
                                                                                             counts)))
    ymid = 0.5 * (np.minimum.reduceat(flat.xy_db[:, 1], flat.start[:-1])
                  + np.maximum.reduceat(flat.xy_db[:, 1], flat.start[:-1]))
    n = 0
    for band in layout.bands:
        x0, y0, x1, y1 = band.box_db
        sel = polys[(ymid > y0) & (ymid < y1)]
        rb = shapely.intersection(layout.region, shapely.box(x0, y0, x1, y1))
        n += shapely.get_parts(shapely.difference(rb, shapely.union_all(sel))).size
    return int(n)


def _child(tone: str, mask: str, design_path: str, out: str) -> None:
    """Read and decode one mask (run in its own process); write the figures and the site table."""
    import numpy as np

    from metalay.cells.library import load_library
    from metalay.checks.openings import decode_written, written_layer
    from metalay.design.spec import load_design
    from metalay.io.gdsread import read_mask

    design = load_design(design_path)
    lib = load_library(design.library)
    layer = design.mask.layer("structures")
    t0 = time.perf_counter()
    flat = read_mask(mask, layers=[written_layer(design, layer)])
    t1 = time.perf_counter()
    if tone == "naive":
        n = _naive_openings(flat, design)
        Path(out + ".json").write_text(json.dumps({
            "tone": "naive union", "read_s": t1 - t0, "decode_s": time.perf_counter() - t1, "sites": n,
            "polygons": int(flat.count), "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}))
        return
    dec = decode_written(flat, lib.cells, design, period_nm=design.lattice.period_nm, lattice=design.lattice.kind,
                         layer=layer, bias_nm=design.mask.bias_nm, where=mask)
    t2 = time.perf_counter()
    np.savez(out + ".npz", i=dec.i, j=dec.j, rot=dec.rotation_rad)
    Path(out + ".json").write_text(json.dumps({
        "tone": tone, "read_s": t1 - t0, "decode_s": t2 - t1, "sites": len(dec), "polygons": int(flat.count),
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter-um", type=float, default=300.0)
    ap.add_argument("--rows", type=int, default=64, help="complement_band_rows of the complement compile")
    ap.add_argument("--no-naive", action="store_true", help="skip the per-band union baseline (slow)")
    ap.add_argument("--child", nargs=4, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        _child(*args.child)
        return 0
    import numpy as np

    from metalay.api import compile_design
    from metalay.design.spec import load_design, parse_design

    base = load_design(ROOT / "examples" / "axicon-slots-1550.toml")
    figures = {}
    with tempfile.TemporaryDirectory() as tmp:
        for tone in ("structures", "complement"):
            raw = json.loads(json.dumps(base.raw))
            raw["aperture"]["diameter_um"] = args.diameter_um
            raw["design"]["name"] = f"bench-{tone}"
            raw["mask"].update({"tone": tone, "formats": ["gds"], "complement_band_rows": args.rows})
            raw["checks"] = {"rules": False, "optics": False}
            path = Path(tmp) / f"{tone}.toml"
            path.write_text(_toml(raw))
            design = parse_design(raw, where=str(path))
            t0 = time.perf_counter()
            res = compile_design(design, Path(tmp) / tone, show_progress=False)
            compile_s = time.perf_counter() - t0
            out = str(Path(tmp) / f"{tone}-decoded")
            subprocess.run([sys.executable, __file__, "--child", tone, str(res.files["gds"]), str(path), out],
                           check=True)
            figures[tone] = json.loads(Path(out + ".json").read_text())
            figures[tone]["compile_s"] = compile_s
            figures[tone]["table"] = dict(np.load(out + ".npz"))
            if tone == "complement" and not args.no_naive:
                subprocess.run([sys.executable, __file__, "--child", "naive", str(res.files["gds"]), str(path),
                                out + "-naive"], check=True)
                figures["naive"] = json.loads(Path(out + "-naive.json").read_text())
    s, c = figures["structures"], figures["complement"]
    same = np.array_equal(s["table"]["i"], c["table"]["i"]) and np.array_equal(s["table"]["j"], c["table"]["j"])
    drot = np.degrees(np.angle(np.exp(2j * (s["table"]["rot"] - c["table"]["rot"])))) / 2 if same else None
    print(f"design: examples/axicon-slots-1550.toml at {args.diameter_um:g} um, {s['sites']:,} sites")
    for f in (s, c):
        print(f"  {f['tone']:<12}  compile {f['compile_s']:6.2f} s  read {f['read_s']:6.2f} s  decode "
              f"{f['decode_s']:6.2f} s  peak {f['peak_mb']:7.1f} MB  ({f['polygons']:,} polygons read)")
    if "naive" in figures:
        n = figures["naive"]
        print(f"  {'naive union':<12}  (per band: region minus the union of its pieces) {n['decode_s']:6.2f} s  peak "
              f"{n['peak_mb']:7.1f} MB  ({n['sites']:,} parts); strips are {n['decode_s'] / c['decode_s']:.1f}x "
              "faster")
    print(f"ratio complement / structures: decode {c['decode_s'] / max(s['decode_s'], 1e-9):.1f}x, read + decode "
          f"{(c['read_s'] + c['decode_s']) / max(s['read_s'] + s['decode_s'], 1e-9):.1f}x, peak memory "
          f"{c['peak_mb'] / s['peak_mb']:.2f}x; decode / compile (complement) {c['decode_s'] / c['compile_s']:.2f}")
    print(f"same sites: {same}; largest rotation difference {np.max(np.abs(drot)) if same else float('nan'):.4f} deg")
    return 0


def _toml(d: dict, prefix: str = "") -> str:
    """Minimal TOML for the bench's design tables (scalars, lists of scalars, tables, arrays of tables)."""
    def scalar(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, list):
            return "[" + ", ".join(scalar(x) for x in v) + "]"
        return repr(v)

    lines = [f"{k} = {scalar(v)}" for k, v in d.items() if not isinstance(v, (dict, list))
             or (isinstance(v, list) and not (v and isinstance(v[0], dict)))]
    for k, v in d.items():
        if isinstance(v, dict):
            lines += [f"[{prefix}{k}]", _toml(v, f"{prefix}{k}.")]
        elif isinstance(v, list) and v and isinstance(v[0], dict):
            for item in v:
                lines += [f"[[{prefix}{k}]]", _toml(item, f"{prefix}{k}.")]
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(main())
