"""Benchmark: tone inversion (complement) of the built-in demo aperture, tile by tile.

The demo: 300 um circular aperture, 325 nm square lattice (about 6.7e5 sites) of 250 x 85 nm nanofins rotated by the
demo's vortex + tilt phase; ``--diameter-um 370`` gives about 1.0e6 sites. Bands of ``--rows`` lattice rows are
inverted with :func:`metalay.mask.process.complement_tile` and streamed into a flat GDSII file. Figures are printed with
ratios against a baseline measured in the same run: the structures-tone layout of the same bands (sites, phase,
rotation, snapped outlines and the flat GDSII of the structures).

Usage::

    .venv/bin/python bench/bench_tone.py [--diameter-um 370] [--rows 64] [--verify-every 8]

Not collected by pytest.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import shapely

from metalay.cells.cellkinds import outline_nm
from metalay.cells.library import load_library
from metalay.design.lattice import Aperture, sample_sites
from metalay.design.phase import target_phase
from metalay.design.spec import load_design
from metalay.designs import __file__ as _designs_init
from metalay.io.writer import MAX_GDS_VERTICES, GdsStream
from metalay.mask.layout import element_offsets, element_polygons, snap_centres
from metalay.mask.mapping import assign_cells
from metalay.mask.process import aperture_region_db, complement_bands, complement_tile, pieces_by_vertex_count


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _band_elements(design, library, outline, rows, db):
    sites = sample_sites(design.aperture, design.lattice, rows=rows)
    if len(sites) == 0:
        return np.zeros((0, 2), np.int64), np.zeros((0, outline.shape[0], 2), np.int32)
    phi = target_phase(design.terms, sites.x_um, sites.y_um, wavelength_nm=design.wavelength_nm, sigma=design.sigma)
    a = assign_cells(phi, library, sigma=design.sigma)
    return snap_centres(sites.x_um, sites.y_um, db), element_offsets(outline, a.rotation_rad, db)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--diameter-um", type=float, default=370.0)
    ap.add_argument("--rows", type=int, default=64)
    ap.add_argument("--verify-every", type=int, default=8, help="measure the XOR area on every k-th band (0: none)")
    args = ap.parse_args(argv)

    design = load_design(Path(_designs_init).parent / "demo_vortex.toml")
    design = replace(design, aperture=Aperture("circle", diameter_um=args.diameter_um))
    library = load_library(design.library)
    outline = outline_nm(library.cells[0])
    db = design.mask.db_unit_nm
    region = aperture_region_db(design.aperture, db_unit_nm=db)
    reach_nm = float(np.hypot(*outline.max(axis=0))) + 1.0
    bands = complement_bands(region, design.lattice, design.aperture, db_unit_nm=db, reach_nm=reach_nm,
                             rows_per_band=args.rows)

    with tempfile.TemporaryDirectory() as tmp:
        # baseline: structures tone, same bands (without halo), flat GDSII
        t0 = time.perf_counter()
        n_sites = 0
        with GdsStream(Path(tmp) / "structures.gds", "demo", db_unit_nm=db) as gs:
            for band in bands:
                y0, y1 = band.box_db[1], band.box_db[3]
                c, o = _band_elements(design, library, outline, band.rows, db)
                own = (c[:, 1] >= y0) & ((c[:, 1] < y1) | (y1 == bands[-1].box_db[3]))
                n_sites += int(own.sum())
                gs.boundaries(1, 0, element_polygons(c[own], o[own]))
        t_base = time.perf_counter() - t0
        size_base = (Path(tmp) / "structures.gds").stat().st_size

        # tone inversion: same bands, with their halo rows
        t0 = time.perf_counter()
        c0 = time.process_time()
        t_geom = 0.0
        n_poly = n_vert = vmax = 0
        area_out = area_target = 0.0
        xor = bound = 0.0
        verified = 0
        with GdsStream(Path(tmp) / "complement.gds", "demo", db_unit_nm=db) as gs:
            for k, band in enumerate(bands):
                c, o = _band_elements(design, library, outline, band.rows, db)
                verify = args.verify_every > 0 and k % args.verify_every == 0
                tg = time.perf_counter()
                tile = complement_tile(c, o, region, band.box_db, verify=verify)
                t_geom += time.perf_counter() - tg
                for _nv, verts in pieces_by_vertex_count(tile):
                    gs.boundaries(1, 0, verts)
                n_poly += tile.count
                n_vert += int(tile.xy_db.shape[0])
                vmax = max(vmax, tile.max_vertices)
                area_out += tile.area_db2
                area_target += tile.target_area_db2
                if verify:
                    verified += 1
                    xor += tile.xor_area_db2
                    bound += tile.xor_bound_db2
        t_comp = time.perf_counter() - t0
        cpu_comp = time.process_time() - c0
        size_comp = (Path(tmp) / "complement.gds").stat().st_size

    # independent whole-mask area check: region area - sum of element areas (shoelace), no overlay
    elem_area = 0.0
    for band in bands:
        c, o = _band_elements(design, library, outline, band.rows, db)
        y0, y1 = band.box_db[1], band.box_db[3]
        own = (c[:, 1] >= y0) & ((c[:, 1] < y1) | (y1 == bands[-1].box_db[3]))
        v = o[own].astype(np.float64)
        x, y = v[..., 0], v[..., 1]
        elem_area += float(np.sum(0.5 * (x * np.roll(y, -1, 1) - np.roll(x, -1, 1) * y).sum(1)))
    expected = float(shapely.area(region)) - elem_area

    print(f"demo aperture {args.diameter_um:g} um circle, {design.lattice.kind} {design.lattice.period_nm:g} nm, "
          f"{n_sites:,} sites, {len(bands)} bands of {args.rows} rows")
    print(f"baseline (structures tone, flat GDSII): {t_base:.1f} s, {size_base / 1e6:.1f} MB")
    print(f"complement: {t_comp:.1f} s total ({t_geom:.1f} s in complement_tile), ratio {t_comp / t_base:.2f}x "
          f"baseline; CPU {cpu_comp:.1f} s; {size_comp / 1e6:.1f} MB")
    print(f"output: {n_poly:,} hole-free polygons, {n_vert:,} vertices, largest {vmax} vertices "
          f"(limit {MAX_GDS_VERTICES})")
    print(f"area: output {area_out:.6e} nm^2, exact {area_target:.6e}, independent (region - sum of element "
          f"areas) {expected:.6e}; relative difference {abs(area_out - expected) / expected:.2e}")
    if verified:
        print(f"XOR check on {verified} bands: {xor:.4g} nm^2 (grid bound {bound:.4g} nm^2, ratio "
              f"{xor / bound:.3f})")
    print(f"peak memory (max RSS): {_peak_mb():.0f} MB")
    ok = vmax <= MAX_GDS_VERTICES and (not verified or xor <= bound) and t_comp < 120 and _peak_mb() < 4096
    print("PASS" if ok else "FAIL", "(limits: 120 s, 4096 MB, vertex limit, XOR within bound)")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
