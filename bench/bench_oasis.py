"""Benchmark: write 1e6 and 1e7 rotated nanofins as metalay's streamed OASIS, gdstk's OASIS and metalay's flat GDSII.

The same sites as a compile makes (square lattice of 325 nm in a circular aperture, vortex charge 3 + lens f = 5 mm at
532 nm, the 250 x 85 nm fin rotated by the geometric-phase angle and snapped to a 1 nm grid relative to its centre)
are generated band by band (tiles of ~250 000 sites; the per-site work of each band runs in worker threads and the
main thread writes the bands in order, as compile does) and written by:

* ``gds``    metalay's streamed flat GDSII (snap -> BOUNDARY records -> GdsStream), the baseline;
* ``oasis``  metalay's streamed OASIS (snap -> group by exact shape -> OasisStream.add_shape_groups);
* ``gdstk``  gdstk's OASIS writer (snap -> group by exact shape -> all groups held -> one polygon + explicit
  repetition per shape -> Library.write_oas, compression level 1), the route compile uses today.

Each case runs in its own process (peak memory = ru_maxrss of that process); every file is fsynced. Then each file is
read back to flat polygon arrays (metalay's reader on the GDSII and on the OASIS; gdstk's OASIS reader with numpy
expansion of the repetitions, the route read_mask used before). The ratios are what counts (the machine is shared;
absolute seconds vary by +-30 %).

Run:  .venv/bin/python bench/bench_oasis.py [--sites 1e6 1e7] [--threads 2]
"""

from __future__ import annotations

import argparse
import collections
import json
import math
import resource
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

PERIOD_NM = 325.0
SITES_PER_TILE = 250_000


def _bands(diameter_um: float):
    from metalay.design.lattice import Aperture, Lattice, row_range

    ap, lat = Aperture("circle", diameter_um=diameter_um), Lattice("square", PERIOD_NM)
    j0, j1 = row_range(ap, lat)
    rows = max(1, int(SITES_PER_TILE / (diameter_um * 1000.0 / PERIOD_NM)))
    return ap, lat, [(a, min(a + rows, j1)) for a in range(j0, j1, rows)]


def _sites(ap, lat, rows):
    """(centres_db (N, 2) int64, SnappedRows) of one band, like the compile's tile function."""
    from metalay.design.lattice import sample_sites
    from metalay.design.phase import Lens, Vortex, target_phase
    from metalay.mask.layout import snap_centres, snap_rows
    from metalay.mask.mapping import geometric_rotation

    outline = np.array([[125.0, 42.5], [-125.0, 42.5], [-125.0, -42.5], [125.0, -42.5]])
    s = sample_sites(ap, lat, rows=rows)
    phi = target_phase((Vortex(3), Lens(5000.0)), s.x_um, s.y_um, wavelength_nm=532.0)
    return snap_centres(s.x_um, s.y_um, 1.0), snap_rows(outline, geometric_rotation(phi, 1), 1.0)


def _tile(mode, ap, lat, rows):
    """All per-site work of one band for ``mode`` (runs in a worker thread, like compile's ``_tile``)."""
    from metalay.mask.layout import group_shapes

    centres, snapped = _sites(ap, lat, rows)
    if mode == "gds":
        from metalay.io.writer import boundary_records_rows

        return len(centres), boundary_records_rows(1, 0, centres, snapped)
    g = group_shapes(snapped.offsets())
    if mode == "oasis":
        from metalay.io.oasis_write import encode_shape_groups, pack_cblocks

        enc = encode_shape_groups(1, 0, g.shapes_db, g.shape_of_site, centres)
        return len(centres), (pack_cblocks(enc), enc.polygons)
    return len(centres), (g, centres.astype(np.int32))


def _in_order(fn, tasks, threads: int):
    """Yield fn(task) in order with at most ``threads`` tasks computed ahead (compile's ``_run_tiles``)."""
    if threads <= 1:
        for t in tasks:
            yield fn(t)
        return
    with ThreadPoolExecutor(max_workers=threads) as pool:
        pending = collections.deque()
        for t in tasks:
            pending.append(pool.submit(fn, t))
            if len(pending) > threads:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _read(mode: str, folder: str) -> dict:
    """Read a written file back to flat polygon arrays: metalay's reader (OASIS or GDSII, through read_mask) or
    gdstk's OASIS reader with the repetitions expanded by numpy (how read_mask read OASIS before)."""
    from metalay.util._memory import keep_freed_memory

    keep_freed_memory()  # as the command line does
    t0 = time.perf_counter()
    if mode == "read_gdstk":
        import gdstk

        lib = gdstk.read_oas(str(Path(folder) / "oasis.oas"))
        xy, counts = [], []
        for p in lib.cells[0].polygons:  # as read_mask's gdstk route did: one expansion per polygon record
            offs = p.repetition.get_offsets() if p.repetition.size else np.zeros((1, 2))
            pts = np.rint((p.points[None, :, :] + offs[:, None, :]) * 1000).astype(np.int64)
            xy.append(pts.reshape(-1, 2))
            counts.append(np.full(pts.shape[0], pts.shape[1], np.int64))
        xy, counts = np.concatenate(xy), np.concatenate(counts)
        n = counts.shape[0]
    else:
        from metalay.io.gdsread import read_mask

        n = read_mask(Path(folder) / ("oasis.oas" if mode == "read_oasis" else "gds.gds")).count
    return {"polygons": n, "seconds": time.perf_counter() - t0,
            "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


def _child(mode: str, folder: str, diameter_um: float, threads: int) -> dict:
    if mode.startswith("read"):
        return _read(mode, folder)
    t0 = time.perf_counter()
    path = Path(folder) / f"{mode}.{'gds' if mode == 'gds' else 'oas'}"
    ap, lat, bands = _bands(diameter_um)
    tiles = _in_order(lambda rows: _tile(mode, ap, lat, rows), bands, threads)
    n = 0
    if mode == "gds":
        from metalay.io.writer import GdsStream

        with GdsStream(path, "BENCH", db_unit_nm=1.0) as gds:
            for k, rec in tiles:
                gds.write_records(rec)
                n += k
    elif mode == "oasis":
        from metalay.io.oasis_write import OasisStream

        with OasisStream(path, "BENCH", db_unit_nm=1.0) as oas:
            for k, (blob, polys) in tiles:
                oas.write_packed(blob, polygons=polys)
                n += k
    else:
        from metalay.io.writer import build_gdstk_flat, write_gdstk_library

        table, shapes, site_shape, site_centre = {}, [], [], []
        for k, (g, centres) in tiles:  # as compile gathers the groups for gdstk today
            gmap = np.empty(len(g.shapes_db), np.int64)
            for u, shp in enumerate(g.shapes_db):  # distinct shapes (~1e3), not sites
                gmap[u] = table.setdefault(shp.tobytes(), len(table))
                if gmap[u] == len(shapes):
                    shapes.append(shp)
            site_shape.append(gmap[g.shape_of_site])
            site_centre.append(centres)
            n += k
        sid = np.concatenate(site_shape)
        cen = np.concatenate(site_centre)
        order = np.argsort(sid, kind="stable")
        bounds = np.searchsorted(sid[order], np.arange(len(shapes) + 1))
        groups = [(1, 0, shapes[k], cen[order[bounds[k]:bounds[k + 1]]].astype(np.int64)) for k in range(len(shapes))]
        lib = build_gdstk_flat("BENCH", groups, [], db_unit_nm=1.0)
        write_gdstk_library(lib, path, "oas")
    return {"sites": n, "seconds": time.perf_counter() - t0, "bytes": path.stat().st_size,
            "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


def _run(mode: str, folder: str, diameter_um: float, threads: int) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", mode, "--folder", folder, "--diameter-um",
                           str(diameter_um), "--threads", str(threads)], capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sites", type=float, nargs="+", default=[1e6, 1e7])
    ap.add_argument("--child")
    ap.add_argument("--folder")
    ap.add_argument("--diameter-um", type=float)
    ap.add_argument("--threads", type=int, default=2, help="tile workers (compile uses 2); 1 = serial")
    a = ap.parse_args()
    if a.child:
        print(json.dumps(_child(a.child, a.folder, a.diameter_um, a.threads)))
        return
    out_root = Path(__file__).resolve().parent.parent / "out"
    for target in a.sites:
        diameter = PERIOD_NM * 1e-3 * math.sqrt(4.0 * target / math.pi)
        with tempfile.TemporaryDirectory(dir=out_root) as folder:
            res = {m: _run(m, folder, diameter, a.threads) for m in ("gds", "oasis", "gdstk")}
            reads = {m: _run(m, folder, diameter, a.threads) for m in ("read_gds", "read_oasis", "read_gdstk")}
        g = res["gds"]
        print(f"{res['oasis']['sites']:,} sites (aperture {diameter:.0f} um, {a.threads} tile thread(s)):")
        for m, label in (("gds", "metalay flat GDSII (baseline)"), ("oasis", "metalay streamed OASIS"),
                         ("gdstk", "gdstk OASIS (compile today)")):
            r = res[m]
            print(f"  {label:30s} {r['seconds']:7.2f} s  peak {r['peak_mb']:6.0f} MB  file {r['bytes'] / 1e6:8.2f} MB"
                  f"  time x{r['seconds'] / g['seconds']:.2f}  size 1/{g['bytes'] / r['bytes']:.1f}")
        o = res["oasis"]
        print(f"  OASIS / flat GDSII time {o['seconds'] / g['seconds']:.2f} (goal <= 1.3), GDSII / OASIS size "
              f"{g['bytes'] / o['bytes']:.1f}x (goal >= 20x), OASIS peak {o['peak_mb']:.0f} MB vs gdstk "
              f"{res['gdstk']['peak_mb']:.0f} MB")
        for m, label in (("read_gds", "read_mask(flat GDSII)"), ("read_oasis", "read_mask(OASIS), own reader"),
                         ("read_gdstk", "gdstk.read_oas + numpy expansion")):
            r = reads[m]
            print(f"  read back: {label:34s} {r['seconds']:7.2f} s  peak {r['peak_mb']:6.0f} MB  "
                  f"{r['polygons']:,} polygons")


if __name__ == "__main__":
    main()
