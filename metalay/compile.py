"""The main job: a validated design -> mask files (GDSII, OASIS) + manifest.json, tile by tile.

Pipeline per tile (a band of lattice rows): sites -> target phase -> cell and rotation -> snapped polygons ->
streamed into the flat GDSII file; shape groups (or rotation levels) are gathered for OASIS and hierarchical GDSII,
which gdstk writes at the end. Then the design-rule check and the quick optical check run on the written mask.
"""

from __future__ import annotations

import collections
import hashlib
import json
import math
import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .atomic import atomic_write_text, ensure_dir
from .cellkinds import is_rotation_invariant, outline_nm
from .errors import DesignError, MetalayError
from .lattice import aperture_area_um2, cell_area_um2, row_range, sample_sites
from .layout import (element_offsets, frame_polygons, group_shapes, recovered_rotation,
                     snap_centres, text_polygons)
from .library import CellLibrary, load_library
from .mapping import assign_cells, wrap_pi
from .phase import phase_gradient, target_phase
from .progress import progress
from .spec import Design
from .writer import GdsStream, boundary_records, build_gdstk_flat, build_gdstk_levels, write_gdstk_library

__all__ = ["CompileResult", "compile_design", "SAFETY_CAUTION", "design_warnings", "medium_index"]

SAFETY_CAUTION = (
    "Caution: metalay is a design aid. Verify every mask with full-wave simulation and against your facility's "
    "process rules before fabrication. Lithography, etching and lift-off use hazardous chemicals (resists, "
    "developers, solvents, hydrofluoric acid); the finished device is used with lasers. Follow your site's "
    "chemical-safety and laser-safety rules (laser class, eyewear, beam enclosures) and local codes; defer to "
    "licensed professionals where required.")

#: Sites per tile: bounds memory (about 200 bytes per site in flight).
SITES_PER_TILE = 250_000
#: Sites sampled for the aliasing estimate.
ALIAS_SAMPLES = 200_000


@dataclass(frozen=True)
class CompileResult:
    """What :func:`compile_design` produced."""

    out_dir: Path
    files: dict
    manifest: dict
    warnings: tuple[str, ...]
    summary: tuple[str, ...]
    timings_s: dict = field(default_factory=dict)


def medium_index(name: str, wavelength_nm: float) -> float | None:
    """Real refractive index of a named medium at ``wavelength_nm`` (None when unknown)."""
    if name in ("air", "vacuum"):
        return 1.0
    try:
        from . import materials
    except ImportError:  # pragma: no cover - materials module is part of the package
        return None
    try:
        n = materials.refractive_index(name, wavelength_nm)
    except (MetalayError, AttributeError, KeyError, ValueError):
        return None
    return float(np.real(n))


def design_warnings(design: Design, library: CellLibrary, *, alias_fraction: float, alias_r_max_um: float,
                    alias_r_min_um: float) -> list[str]:
    """Warnings that do not stop the compile.

    Sub-wavelength period: only the zeroth order propagates in a medium of index n at normal incidence when
    ``p < lambda / n`` (grating equation, Born & Wolf, Principles of Optics). Aliasing: a phase that changes by more
    than pi between neighbouring sites cannot be represented by the sampling (Nyquist-Shannon sampling theorem;
    Goodman, Introduction to Fourier Optics, sampling of band-limited functions).
    """
    out = []
    p_nm = design.lattice.period_nm
    wl = design.wavelength_nm
    exit_name = library.exit_medium if library.mode == "transmission" else library.incident_medium
    for label, name in (("exit", exit_name), ("incident", library.incident_medium)):
        n = medium_index(name, wl)
        if n is None:
            out.append(f"index of the {label} medium {name!r} is unknown: sub-wavelength check skipped")
        elif p_nm >= wl / n:
            out.append(f"lattice period {p_nm:g} nm >= wavelength/n = {wl / n:.1f} nm in the {label} medium "
                       f"{name!r} (n = {n:.4f}): spurious diffraction orders propagate there")
        if library.mode == "reflection" or name == exit_name == library.incident_medium:
            break
    if abs(library.period_nm - p_nm) > 1e-9:
        out.append(f"the library was characterised at period {library.period_nm:g} nm but the design uses "
                   f"{p_nm:g} nm: responses may differ")
    if abs(library.design_wavelength_nm - wl) > 0.02 * wl:
        out.append(f"design wavelength {wl:g} nm differs from the library's {library.design_wavelength_nm:g} nm")
    if alias_fraction > 0:
        out.append(f"phase gradient exceeds pi per period at {100 * alias_fraction:.3g}% of sites (radius "
                   f"{alias_r_min_um:.3g} to {alias_r_max_um:.3g} um): the phase is aliased there")
    return out


def _design_hash(design: Design, library: CellLibrary) -> str:
    text = json.dumps(design.raw, sort_keys=True, default=str) + library.sha256
    return hashlib.sha256(text.encode()).hexdigest()


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(8 << 20), b""):
            h.update(block)
    return h.hexdigest()


def compile_design(design: Design, out_dir: str | Path, *, show_progress: bool | None = None,
                   run_rules: bool | None = None, run_optics: bool | None = None,
                   sites_per_tile: int = SITES_PER_TILE) -> CompileResult:
    """Compile ``design`` into mask files and a manifest in ``out_dir``.

    Parameters
    ----------
    design : Design
        A validated design (:func:`metalay.spec.load_design`).
    out_dir : str or Path
        Output folder (created). Files: ``<name>.gds``, ``<name>.oas`` (as requested), ``manifest.json``,
        ``timings.json``.
    show_progress : bool or None
        Progress bar on stderr (None: only on a terminal).
    run_rules, run_optics : bool or None
        Override the design's ``[checks]`` settings.
    sites_per_tile : int
        Tile size bound (memory).

    Returns
    -------
    CompileResult
    """
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    library = load_library(design.library)
    out = ensure_dir(out_dir)
    mask = design.mask
    db = mask.db_unit_nm
    if library.phase_mechanism == "geometric":
        cell_ids = [mask.cell or library.cells[0].id]
        library.cell_index(cell_ids[0])
    else:
        cell_ids = [c.id for c in library.cells]
        if mask.cell is not None:
            raise DesignError(f"{design.source_path}: key 'mask.cell' = {mask.cell!r}: not allowed with the "
                              f"propagation-phase library {library.name!r} (it chooses cells by phase)")
        if mask.hierarchy == "levels":
            raise DesignError(f"{design.source_path}: key 'mask.hierarchy' = 'levels': only for geometric-phase "
                              "libraries (allowed here: 'flat')")
    outlines = [outline_nm(library.cells[library.cell_index(c)]) for c in library_cells(library, cell_ids)]
    levels = mask.rotation_levels
    s_layer, s_dt = mask.layer("structures")

    j0, j1 = row_range(design.aperture, design.lattice)
    sites_per_row = max(1.0, 2 * design.aperture.half_extent_um[0] / design.lattice.period_um)
    rows_per_tile = max(1, int(sites_per_tile / sites_per_row))
    tiles = [(a, min(a + rows_per_tile, j1)) for a in range(j0, j1, rows_per_tile)]

    name = design.name
    gds_path = out / f"{name}.gds"
    want_gds = "gds" in mask.formats
    stream_gds = want_gds and mask.hierarchy == "flat"
    need_groups = "oas" in mask.formats or (want_gds and not stream_gds)
    level_offsets = None
    if levels:
        thetas = np.arange(levels) * np.pi / levels
        level_offsets = [element_offsets(o, thetas, db) for o in outlines]  # (K, V, 2) per cell
    ctx = _TileContext(design=design, library=library, cell_ids=cell_ids, outlines=outlines,
                       level_offsets=level_offsets, layer=(s_layer, s_dt), encode_gds=stream_gds,
                       need_groups=need_groups,
                       alias_stride=max(1, int(math.ceil(_estimate_sites(design) / ALIAS_SAMPLES))))

    n_sites = 0
    per_cell = np.zeros(len(cell_ids), dtype=np.int64)
    worst_snap = 0.0
    quant_err = 0.0
    shape_table: dict = {}
    shape_list: list[tuple[int, np.ndarray]] = []  # (cell slot, offsets (V, 2))
    site_shape: list[np.ndarray] = []
    site_centre: list[np.ndarray] = []
    alias_hits = 0
    alias_total = 0
    alias_r = [math.inf, 0.0]

    known_hashes: dict[str, str] = {}
    t0 = time.perf_counter()
    bar = progress(total=len(tiles), desc=f"{name}: tiles", enabled=show_progress, unit="tile")
    stream = GdsStream(gds_path, name, db_unit_nm=db) if stream_gds else None
    try:
        if stream is not None:
            stream.__enter__()
        for tile in _run_tiles(tiles, ctx):
            bar.update(1)
            if tile.n == 0:
                continue
            n_sites += tile.n
            per_cell += tile.per_cell
            worst_snap = max(worst_snap, tile.worst_snap)
            quant_err = max(quant_err, tile.quant_err)
            alias_hits += tile.alias_hits
            alias_total += tile.alias_total
            alias_r = [min(alias_r[0], tile.alias_r[0]), max(alias_r[1], tile.alias_r[1])]
            if stream is not None:
                for rec in tile.records:
                    stream.write_records(rec)
            for slot, local_keys, local_shapes, shape_idx, centres in tile.groups:
                gmap = np.empty(len(local_keys), dtype=np.int32)
                for u, key in enumerate(local_keys):  # distinct shapes or levels (~1e3), not sites
                    gid = shape_table.get((slot, key))
                    if gid is None:
                        gid = shape_table[(slot, key)] = len(shape_list)
                        shape_list.append((slot, local_shapes[u]))
                    gmap[u] = gid
                site_shape.append(gmap[shape_idx])
                site_centre.append(centres)
        bar.close()
        extras = _extras(design, library)
        if stream is not None:
            stream.polygons(extras)
            stream.__exit__(None, None, None)
            known_hashes[gds_path.name] = stream.sha256
            stream = None
    except BaseException as exc:
        if stream is not None:
            stream.__exit__(type(exc), exc, exc.__traceback__)
        raise
    timings["layout_and_flat_gds_s"] = time.perf_counter() - t0
    if n_sites == 0:
        raise DesignError(f"{design.source_path}: no whole unit cell fits inside the aperture (allowed: aperture "
                          f"larger than one cell of period {design.lattice.period_nm:g} nm)")

    files: dict[str, Path] = {}
    if stream_gds:
        files["gds"] = gds_path
    gk_formats = [f for f in mask.formats if f == "oas" or (f == "gds" and not stream_gds)]
    if gk_formats:
        t0 = time.perf_counter()
        shape_of_site = np.concatenate(site_shape)
        centres_all = np.concatenate(site_centre)
        del site_shape, site_centre
        order = np.argsort(shape_of_site, kind="stable")
        bounds = np.searchsorted(shape_of_site[order], np.arange(len(shape_list) + 1))
        lib = None
        if mask.hierarchy == "levels":
            lib = build_gdstk_levels(
                name, [(s_layer, s_dt, shp) for _, shp in shape_list],
                [centres_all[order[bounds[g]:bounds[g + 1]]].astype(np.int64) for g in range(len(shape_list))],
                extras, db_unit_nm=db)
        else:
            lib = build_gdstk_flat(
                name, [(s_layer, s_dt, shp, centres_all[order[bounds[g]:bounds[g + 1]]].astype(np.int64))
                       for g, (_, shp) in enumerate(shape_list)], extras, db_unit_nm=db)
        del order, centres_all, shape_of_site
        for fmt in gk_formats:
            files[fmt] = write_gdstk_library(lib, out / f"{name}.{fmt}", fmt)
        del lib
        timings["gdstk_write_s"] = time.perf_counter() - t0

    alias_fraction = alias_hits / max(alias_total, 1)
    warnings = design_warnings(design, library, alias_fraction=alias_fraction, alias_r_min_um=alias_r[0],
                               alias_r_max_um=alias_r[1])
    fill = n_sites * cell_area_um2(design.lattice) / aperture_area_um2(design.aperture)
    counts = {
        "sites": int(n_sites),
        "fill_factor": round(float(fill), 6),
        "elements_per_cell": {cid: int(c) for cid, c in zip(cell_ids, per_cell)},
        "distinct_shapes": len(shape_list),
        "tiles": len(tiles),
    }
    errors = {
        "worst_snapping_phase_error_deg": round(math.degrees(worst_snap), 6),
        "worst_quantisation_phase_error_deg": round(math.degrees(quant_err), 6),
        "aliased_site_fraction": round(alias_fraction, 6),
    }
    checks = {}
    primary = files.get("gds") or files.get("oas")
    do_rules = design.checks.rules if run_rules is None else run_rules
    if do_rules:
        t0 = time.perf_counter()
        checks["rules"] = _run_rules(primary, library, design)
        timings["rules_s"] = time.perf_counter() - t0
    do_optics = design.checks.optics if run_optics is None else run_optics
    if do_optics:
        t0 = time.perf_counter()
        checks["optics"] = _run_optics(primary, library, design)
        timings["optics_s"] = time.perf_counter() - t0

    manifest = {
        "metalay_manifest_version": 1,
        "design": {"name": name, "source": Path(design.source_path).name, "echo": design.raw},
        "design_hash": _design_hash(design, library),
        "library": {"name": library.name, "sha256": library.sha256, "mode": library.mode,
                    "phase_mechanism": library.phase_mechanism, "cells_used": cell_ids,
                    "responses": library.provenance.get("responses_source", "")},
        "mask": {"db_unit_nm": db, "user_unit_um": 1.0, "hierarchy": mask.hierarchy,
                 "rotation_levels": levels, "layers": {k: list(v) for k, v in mask.layers}},
        "counts": counts,
        "errors": errors,
        "warnings": warnings,
        "checks": checks,
        "files": {fmt: {"name": p.name, "bytes": p.stat().st_size, "sha256": known_hashes.get(p.name) or _sha256(p)}
                  for fmt, p in sorted(files.items())},
        "timings_file": "timings.json",
        "caution": SAFETY_CAUTION,
    }
    atomic_write_text(out / "manifest.json", json.dumps(manifest, sort_keys=True, indent=2, default=str) + "\n")
    timings["total_s"] = time.perf_counter() - t_start
    atomic_write_text(out / "timings.json", json.dumps({k: round(v, 3) for k, v in timings.items()},
                                                       sort_keys=True, indent=2) + "\n")
    files["manifest"] = out / "manifest.json"
    summary = _summary(design, library, manifest, files)
    return CompileResult(out, files, manifest, tuple(warnings), tuple(summary), timings)


@dataclass(frozen=True)
class _TileContext:
    design: Design
    library: CellLibrary
    cell_ids: list
    outlines: list
    level_offsets: list | None
    layer: tuple
    encode_gds: bool
    need_groups: bool
    alias_stride: int


@dataclass
class _TileOut:
    n: int
    per_cell: np.ndarray
    records: list
    groups: list
    worst_snap: float = 0.0
    quant_err: float = 0.0
    alias_hits: int = 0
    alias_total: int = 0
    alias_r: tuple = (math.inf, 0.0)


def _tile(rows: tuple[int, int], ctx: _TileContext) -> _TileOut:
    """All per-site work of one tile (a band of lattice rows): a pure function, safe to run in a worker thread."""
    design, library = ctx.design, ctx.library
    db = design.mask.db_unit_nm
    sites = sample_sites(design.aperture, design.lattice, rows=rows)
    ncell = len(ctx.cell_ids)
    if len(sites) == 0:
        return _TileOut(0, np.zeros(ncell, np.int64), [], [])
    phi = target_phase(design.terms, sites.x_um, sites.y_um, wavelength_nm=design.wavelength_nm, sigma=design.sigma)
    a = assign_cells(phi, library, sigma=design.sigma, cell_id=ctx.cell_ids[0] if ncell == 1 else None,
                     rotation_levels=design.mask.rotation_levels, wavelength_nm=design.wavelength_nm)
    centres = snap_centres(sites.x_um, sites.y_um, db)
    out = _TileOut(len(sites), np.zeros(ncell, np.int64), [], [], quant_err=a.quantisation_error_rad)
    # aliasing estimate on a deterministic sub-sample
    sub = slice(0, None, ctx.alias_stride)
    g = phase_gradient(design.terms, sites.x_um[sub], sites.y_um[sub], wavelength_nm=design.wavelength_nm,
                       sigma=design.sigma, step_um=design.lattice.period_um * 1e-3)
    hit = g * design.lattice.period_um > np.pi
    out.alias_total = int(hit.size)
    if hit.any():
        out.alias_hits = int(hit.sum())
        r = np.hypot(sites.x_um[sub][hit], sites.y_um[sub][hit])
        out.alias_r = (float(r.min()), float(r.max()))
    for slot, cid in enumerate(ctx.cell_ids):  # loop over cells (short axis)
        sel = np.flatnonzero(a.cell_index == slot) if ncell > 1 else slice(None)
        theta = a.rotation_rad[sel]
        if theta.size == 0:
            continue
        out.per_cell[slot] = theta.size
        if ctx.level_offsets is not None:
            offsets = ctx.level_offsets[slot][a.level[sel]]
        else:
            offsets = element_offsets(ctx.outlines[slot], theta, db)
        if not is_rotation_invariant(library.cells[library.cell_index(cid)]):
            err = np.abs(wrap_pi(2.0 * (recovered_rotation(offsets) - theta)))
            out.worst_snap = max(out.worst_snap, float(err.max()))
        c_sel = centres[sel]
        if ctx.encode_gds:
            out.records.append(boundary_records(*ctx.layer, centres_db=c_sel, offsets_db=offsets))
        if ctx.need_groups:
            if ctx.level_offsets is not None:
                levels_here, idx = np.unique(a.level[sel], return_inverse=True)
                keys = [int(k) for k in levels_here]
                shapes = [ctx.level_offsets[slot][k] for k in keys]
            else:
                groups = group_shapes(offsets)
                keys = [shp.tobytes() for shp in groups.shapes_db]
                shapes = list(groups.shapes_db)
                idx = groups.shape_of_site
            out.groups.append((slot, keys, shapes, idx.ravel(), c_sel.astype(np.int32)))
    return out


def _run_tiles(tiles, ctx: _TileContext):
    """Yield tile results in order, computing up to ``workers`` tiles ahead in threads (bounded memory)."""
    workers = max(1, min(2, os.cpu_count() or 1))
    if workers == 1 or len(tiles) == 1:
        for rows in tiles:
            yield _tile(rows, ctx)
        return
    with ThreadPoolExecutor(max_workers=workers) as pool:
        pending = collections.deque()
        it = iter(tiles)
        for rows in it:
            pending.append(pool.submit(_tile, rows, ctx))
            if len(pending) > workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def library_cells(library: CellLibrary, cell_ids: list[str]) -> list[str]:
    """The cell ids in use (validated)."""
    return [library.cells[library.cell_index(c)].id for c in cell_ids]


def _estimate_sites(design: Design) -> float:
    return aperture_area_um2(design.aperture) / cell_area_um2(design.lattice)


def _extras(design: Design, library: CellLibrary):
    mask = design.mask
    hw, hh = design.aperture.half_extent_um
    fl, fd = mask.layer("frame")
    polys = frame_polygons(hw, hh, margin_um=mask.frame_margin_um, width_um=mask.frame_width_um,
                           db_unit_nm=mask.db_unit_nm, layer=fl, datatype=fd)
    if mask.label:
        ll, ld = mask.layer("label")
        text = f"{design.name} {_design_hash(design, library)[:8]}"
        x = -hw - mask.frame_margin_um - mask.frame_width_um
        y = -hh - mask.frame_margin_um - mask.frame_width_um - 1.5 * mask.label_height_um
        polys += text_polygons(text, height_um=mask.label_height_um, x_um=x, y_um=y, db_unit_nm=mask.db_unit_nm,
                               layer=ll, datatype=ld)
    return polys


def _run_rules(path: Path, library: CellLibrary, design: Design) -> dict:
    try:
        from . import rules
    except ImportError:
        return {"status": "not available"}
    return rules.compile_check(path, library, design)


def _run_optics(path: Path, library: CellLibrary, design: Design) -> dict:
    try:
        from . import optics
    except ImportError:
        return {"status": "not available"}
    return optics.compile_check(path, library, design)


def _summary(design: Design, library: CellLibrary, manifest: dict, files: dict) -> list[str]:
    c = manifest["counts"]
    e = manifest["errors"]
    lines = [
        f"design {design.name}: {c['sites']:,} sites, fill factor {c['fill_factor']:.3f}, "
        f"{c['distinct_shapes']} distinct snapped shapes",
        f"library {library.name} ({library.mode}, {library.phase_mechanism} phase), cell(s) "
        f"{', '.join(manifest['library']['cells_used'])}",
        f"worst phase error: snapping {e['worst_snapping_phase_error_deg']:.3f} deg, quantisation "
        f"{e['worst_quantisation_phase_error_deg']:.3f} deg",
    ]
    for fmt, info in manifest["files"].items():
        lines.append(f"wrote {info['name']} ({info['bytes'] / 1e6:.2f} MB, sha256 {info['sha256'][:12]})")
    for key, res in manifest["checks"].items():
        lines.append(f"{key} check: {res.get('status', '?')} {res.get('summary', '')}".rstrip())
    for w in manifest["warnings"]:
        lines.append(f"warning: {w}")
    return lines
