"""The main job: a validated design -> mask files (GDSII, OASIS) + manifest.json, tile by tile.

:func:`compile_mask` runs five named stages into a staging folder beside the output folder, then switches it in
whole (:func:`metalay.util.atomic.published_folder`):

1. ``_plan``: library, cells and their biased outlines, datatypes, tiles, output formats; refuses a compile that
   cannot fit the machine's memory or disk before anything is written;
2. ``_write_tiles``: per tile (a band of lattice rows, ``_tile`` / ``_complement_tile`` in worker threads, or as
   tasks on a Dask cluster through :mod:`metalay.mask.cluster`): sites -> target phase -> cell and rotation ->
   snapped polygons -> the records of every output file (flat or hierarchical GDSII, OASIS with repetitions and
   CBLOCKs; :mod:`metalay.mask._emit`), written in tile order by one thread; statistics summed in tile order;
3. ``_run_checks``: the checks the caller hands in (:class:`~metalay.mask.steps.MaskCheck` steps; this module never
   imports a check, the standard set is :func:`metalay.checks.steps.default_checks`);
4. ``_manifest``: counts, worst errors, warnings, check results, file hashes.

Memory is bounded by a few tiles whatever the mask size; the same input gives the same bytes for any number of
threads or cluster workers.
"""

from __future__ import annotations

import collections
import contextlib
import errno
import hashlib
import json
import math
import os
import shutil
import time
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from metalay.cells.cellkinds import is_rotation_invariant, outline_nm
from metalay.cells.library import CellLibrary, load_library
from metalay.design.lattice import aperture_area_um2, cell_area_um2, estimated_sites, row_range, sample_sites
from metalay.design.limits import judge, unmeasured, worst_verdict
from metalay.design.phase import phase_gradient, target_phase
from metalay.design.side import Facing, resolve_facing
from metalay.design.spec import Design
from metalay.errors import DesignError, MetalayError, OutputError
from metalay.mask._emit import EmitPlan, MaskSink, SlotElements, emit_complement, emit_elements
from metalay.mask.checkrun import CheckJob, child_processes, concurrent_bytes, run_jobs, side_by_side
from metalay.mask.layout import (
    element_offsets,
    frame_polygons,
    recovered_rotation,
    snap_centres,
    snap_rows,
    text_polygons,
)
from metalay.mask.mapping import assign_cells, wrap_pi
from metalay.mask.process import (
    WriteFieldGrid,
    alignment_marks,
    bias_outline_nm,
    check_marks_clear,
    complement_layout,
    complement_tile,
    default_mark_positions_um,
    dose_datatype_lut,
    fit_write_fields,
    frame_region_db,
    shift_phase_error_rad,
)
from metalay.mask.spinmap import assign_spin_cells
from metalay.mask.steps import MaskCheck, WrittenMask
from metalay.util._memory import keep_freed_memory
from metalay.util.atomic import atomic_write_text, pause_point, published_folder
from metalay.util.budget import format_bytes, memory_budget, memory_limits
from metalay.util.progress import progress

__all__ = ["CompileResult", "compile_mask", "SAFETY_CAUTION", "SITES_PER_TILE", "design_warnings", "medium_index",
           "compile_memory_bytes", "check_admission_bytes_per_site"]

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
#: Every n-th band of a tone inversion is verified by an exact XOR against the intended region.
COMPLEMENT_VERIFY_EVERY = 16


@dataclass(frozen=True)
class CompileResult:
    """What :func:`compile_mask` produced."""

    out_dir: Path
    files: dict
    manifest: dict
    warnings: tuple[str, ...]
    summary: tuple[str, ...]
    timings_s: dict = field(default_factory=dict)

    def __str__(self) -> str:
        v = self.manifest.get("verdicts", {})
        c = self.manifest.get("counts", {})
        checks = self.manifest.get("checks", {})
        lines = [f"compile of {self.manifest.get('design', {}).get('name', '?')} into {self.out_dir}: "
                 f"{c.get('sites', 0):,} sites", f"verdict: {str(v.get('overall', '?')).upper()}"]
        for k, b in v.get("by_check", {}).items():
            status = checks.get(k, {}).get("status") if isinstance(checks.get(k), dict) else None
            extra = f" ({status})" if status and status != b["verdict"] else ""
            lines.append(f"  {k} check: {b['verdict'].upper()}{extra}")
        lines += [f"  {k}: {Path(p).name}" for k, p in sorted(self.files.items())]
        lines += [f"  warning: {w}" for w in self.warnings]
        return "\n".join(lines)

    def __repr__(self) -> str:
        v = self.manifest.get("verdicts", {})
        return (f"CompileResult(out_dir={str(self.out_dir)!r}, verdict={v.get('overall')!r}, "
                f"files={sorted(self.files)!r}, warnings={len(self.warnings)})")


def medium_index(name: str, wavelength_nm: float) -> float | None:
    """Real refractive index of a named medium at ``wavelength_nm`` (None when unknown)."""
    if name in ("air", "vacuum"):
        return 1.0
    try:
        from metalay.cells import materials
    except ImportError:  # pragma: no cover - materials module is part of the package
        return None
    try:
        n = materials.get_material(name).index(wavelength_nm)
    except MetalayError:
        return None
    return float(np.real(n))


def design_warnings(design: Design, library: CellLibrary, *, alias_fraction: float, alias_r_max_um: float,
                    alias_r_min_um: float, facing: Facing | None = None) -> list[str]:
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
    if any(getattr(t, "encoding", None) == "optimise" for t in design.terms):
        out.append("a multiplex term asks for encoding = 'optimise' but was written with its weights and offsets "
                   "as given (metalay.api.compile_design / metalay compile optimise them)")
    if facing is not None and facing.source == "assumed":
        out.append(f"library {library.name!r} does not record the side it was computed for and the design does not "
                   "state design.lit_from: assumed light arrives through the substrate (the mask is not mirrored)")
    if facing is not None and library.side is not None and facing.lit_from != library.side:
        # From memory: Potton 2004, Rep. Prog. Phys. 67, 717 (reciprocity: the zeroth-order transmission of a
        # mirror-symmetric cell is the same from either side; reflection, absorption and other orders are not)
        out.append(f"the design is lit from the {facing.lit_from} but library {library.name!r} was computed for "
                   f"light arriving from the {library.side}: the zeroth-order responses are used as computed "
                   "(equal by reciprocity for mirror-symmetric cells), other orders and losses may differ")
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


def compile_mask(design: Design, out_dir: str | Path, *, checks: Sequence[MaskCheck] = (),
                 show_progress: bool | None = None, sites_per_tile: int = SITES_PER_TILE,
                 annotations: dict | None = None, max_memory_bytes: int | None = None,
                 report=None, workers: int | None = None, scheduler: str | None = None) -> CompileResult:
    """Compile ``design`` into mask files and a manifest in ``out_dir`` (all or nothing), then run ``checks``.

    Everything is written into a staging folder beside ``out_dir`` and switched in as a whole with one rename when
    every stage (writing and every check) has succeeded (:func:`metalay.util.atomic.published_folder`): the
    folder holds the previous complete set or the new one, never a mix; a failed run leaves the previous set (or
    no folder). A second compile into the same folder while this one runs stops at once with
    :class:`~metalay.errors.OutputBusyError` (exit code 75).

    Parameters
    ----------
    design : Design
        A validated design (:func:`metalay.design.spec.load_design`).
    out_dir : str or Path
        Output folder, replaced as a whole (it must be new, empty or an earlier metalay output folder). Files:
        ``<name>.gds``, ``<name>.oas`` (as requested), ``manifest.json``, ``timings.json`` and whatever the checks
        write (e.g. ``optics/``).
    checks : sequence of MaskCheck
        Checks run on the written mask, in order, when enabled for this design; their results go to
        ``manifest["checks"]``. The standard set is :func:`metalay.checks.steps.default_checks`
        (:func:`metalay.api.compile_design` passes it).
    show_progress : bool or None
        Progress bar on stderr (None: only on a terminal).
    sites_per_tile : int
        Tile size bound (memory).
    annotations : dict, optional
        What was worked out before the compile (e.g. ``{"multiplex_encoding": [...]}`` from
        :func:`metalay.api.prepare_design`), recorded as ``manifest["derived"]``; an entry's records may carry a
        ``summary`` line, printed in the compile summary.
    max_memory_bytes : int, optional
        Memory budget of the admission check before anything is written (:func:`compile_memory_bytes` against
        it); default 80 % of the least of the memory available, the free part of the cgroup limit and of the
        address-space limit (:func:`metalay.util.budget.memory_budget`).
    report : callable (WrittenMask, manifest dict, sections dict) -> str, optional
        Writes ``report.html`` after the manifest from the manifest and the report sections the checks handed
        back (``sections[check name]``); :func:`metalay.checks.steps.compile_report_step` is the standard one.
    workers : int, optional
        Run the tiles as tasks on a local Dask cluster of this many worker processes
        (:mod:`metalay.mask.cluster`); the files are byte-identical to a compile without it.
    scheduler : str, optional
        Address of an existing Dask scheduler (``tcp://host:8786``) to run the tiles on instead; its workers must
        see the output folder's file system.

    Returns
    -------
    CompileResult
    """
    keep_freed_memory()
    out = Path(out_dir)
    with published_folder(out) as stage, contextlib.ExitStack() as cluster:
        runner = None
        if workers is not None or scheduler is not None:
            from metalay.mask.cluster import tile_runner

            runner = cluster.enter_context(tile_runner(stage, workers=workers, scheduler=scheduler,
                                                       where=str(design.source_path)))
        try:
            result = _compile_into(design, stage, checks=checks, show_progress=show_progress,
                                   sites_per_tile=sites_per_tile, annotations=annotations or {},
                                   max_memory_bytes=max_memory_bytes, report=report, runner=runner)
        except OSError as exc:  # e.g. the disk filled up while writing: one line, nothing left behind
            raise OutputError(_write_failure(out, exc)) from exc
        except MetalayError as exc:  # name the output folder the user gave, not the staging folder beside it
            if str(stage) not in str(exc):
                raise
            raise type(exc)(str(exc).replace(str(stage), str(out))) from exc
    moved = {key: out / Path(p).relative_to(stage) for key, p in result.files.items()}
    return replace(result, out_dir=out, files=moved)


def _write_failure(out: Path, exc: OSError) -> str:
    """One line for an operating-system error while writing; a full disk is named as such."""
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return f"{out}: the disk is full ({exc.strerror}); nothing was published, free space and run again"
    return f"{out}: writing failed ({exc.strerror or exc})"


def _compile_into(design: Design, out: Path, *, checks: Sequence[MaskCheck], show_progress: bool | None,
                  sites_per_tile: int, annotations: dict, max_memory_bytes: int | None = None,
                  report=None, runner=None) -> CompileResult:
    """The stages of one compile into the folder ``out``: plan, tiles (written as they come), checks, manifest."""
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    enabled = [c for c in checks if c.enabled(design)]
    plan = _plan(design, out, sites_per_tile=sites_per_tile,
                 structures_for_checks=any(c.needs_structures for c in enabled),
                 admitted_checks=enabled, max_memory_bytes=max_memory_bytes)
    with child_processes(enabled, plan.checks_side_by_side and runner is None) as children:
        t0 = time.perf_counter()
        gathered, known_hashes = _write_tiles(plan, show_progress=show_progress, runner=runner)
        timings["layout_and_write_s"] = time.perf_counter() - t0
        files = {fmt: plan.paths[fmt] for fmt in ("gds", "oas") if fmt in design.mask.formats}
        pause_point("written")
        t0 = time.perf_counter()
        results, sections = _run_checks(plan, enabled, files, timings, max_memory_bytes, runner, known_hashes,
                                        children)
        timings["checks_s"] = time.perf_counter() - t0
    pause_point("checked")
    manifest = _manifest(plan, gathered, files, results, known_hashes)
    if annotations:
        manifest["derived"] = annotations
    atomic_write_text(out / "manifest.json", json.dumps(manifest, sort_keys=True, indent=2, default=str) + "\n")
    if report is not None:  # after the manifest: the report shows its verdicts (it is not listed in it)
        t0 = time.perf_counter()
        primary = files.get("gds") or files.get("oas")
        text = report(WrittenMask(primary, plan.library, plan.design), manifest, sections)
        atomic_write_text(out / "report.html", text)
        files["report"] = out / "report.html"
        timings["report_s"] = time.perf_counter() - t0
    timings["total_s"] = time.perf_counter() - t_start
    atomic_write_text(out / "timings.json", json.dumps(_rounded(timings), sort_keys=True, indent=2) + "\n")
    files["manifest"] = out / "manifest.json"
    summary = _summary(design, plan.library, manifest, files)
    return CompileResult(out, files, manifest, tuple(manifest["warnings"]), tuple(summary), timings)


# ----------------------------------------------------------------------------------------------------------------
# Stage 1: the plan (cells, datatypes, tiles, output formats), checked against the machine before writing
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Plan:
    """Everything decided before the first tile: what to write, where, and how the tiles are cut."""

    design: Design
    library: CellLibrary
    out: Path
    cell_ids: list
    outlines: list
    classes: list            # structure classes: cell ids, then complement, frame, label, marks
    lut: np.ndarray          # datatype per class
    grid: WriteFieldGrid | None
    tiles: list              # (row0, row1) per tile, or (rows, box_db, verify) per complement band
    ctx: "_TileContext"
    need_groups: bool        # OASIS or hierarchical output: group the elements by exact shape (or level) per tile
    per_field: bool          # one GDSII/OASIS cell per write field
    facing: Facing = Facing()  # the side the light arrives from (mapping frame)
    streamed_checks: frozenset = frozenset()  # checks the admission counted with their streamed method
    checks_side_by_side: bool = False  # the streamed checks run at the same time (metalay.mask.checkrun)

    @property
    def complement(self) -> bool:
        return self.design.mask.tone == "complement"

    @property
    def gds_path(self) -> Path:
        return self.out / f"{self.design.name}.gds"

    @property
    def holes_path(self) -> Path:
        return self.out / ".structures-for-rules.gds"

    @property
    def oas_path(self) -> Path:
        return self.out / f"{self.design.name}.oas"

    @property
    def paths(self) -> dict:
        return {"gds": self.gds_path, "oas": self.oas_path, "holes": self.holes_path}

    def datatype(self, purpose: str) -> int:
        return int(self.lut[self.classes.index(purpose)])


def _cells_and_outlines(design: Design, library: CellLibrary) -> tuple[list, list]:
    """Cell ids the design uses and their biased outlines (nm, rotation 0)."""
    mask = design.mask
    _check_spin_library(design, library)
    if library.phase_mechanism == "geometric":
        cell_ids = [mask.cell or library.cells[0].id]
        library.cell_index(cell_ids[0])
    else:
        cell_ids = [c.id for c in library.cells]
        kind = "propagation-phase" if library.phase_mechanism == "propagation" else "spin-decoupled"
        if mask.cell is not None:
            raise DesignError(f"{design.source_path}: key 'mask.cell' = {mask.cell!r}: not allowed with the "
                              f"{kind} library {library.name!r} (it chooses cells by phase)")
        if mask.hierarchy == "levels":
            raise DesignError(f"{design.source_path}: key 'mask.hierarchy' = 'levels': only for geometric-phase "
                              "libraries (allowed here: 'flat')")
    outlines = [bias_outline_nm(outline_nm(library.cells[library.cell_index(c)]), mask.bias_nm,
                                corner=mask.bias_corners, where=design.source_path)
                for c in cell_ids]
    return cell_ids, outlines


def _check_spin_library(design: Design, library: CellLibrary) -> None:
    """A design with a phase per input spin needs a spin_decoupled library, and such a library needs one."""
    spin_lib = library.phase_mechanism == "spin_decoupled"
    if design.spin_decoupled and not spin_lib:
        raise DesignError(f"{design.source_path}: key 'design.library' = {design.library!r}: a design with "
                          "[[phase_spin_plus]] and [[phase_spin_minus]] needs a spin_decoupled library (bundled: "
                          f"tio2-decoupled-532, asi-decoupled-1550); {library.name!r} is {library.phase_mechanism}")
    if spin_lib and not design.spin_decoupled:
        raise DesignError(f"{design.source_path}: key 'design.library' = {design.library!r}: a spin_decoupled "
                          "library gives each input spin its own phase; give [[phase_spin_plus]] and "
                          "[[phase_spin_minus]] instead of [[phase]] and design.input_spin")


def _datatype_table(design: Design, cell_ids: list) -> tuple[list, np.ndarray]:
    """Structure classes and their datatypes (dose datatypes; purposes keep their own unless a dose one is set)."""
    mask = design.mask
    classes = list(cell_ids) + ["complement", "frame", "label", "marks"]
    dose = dict(mask.dose_datatypes)
    lut = dose_datatype_lut(classes, dose, mask.layer("structures")[1], where=design.source_path)
    for purpose in ("frame", "label", "marks"):
        if purpose not in dose:
            lut[classes.index(purpose)] = mask.layer(purpose)[1]
    return classes, lut


def _plan(design: Design, out: Path, *, sites_per_tile: int, structures_for_checks: bool,
          admitted_checks: Sequence[MaskCheck] = (), max_memory_bytes: int | None = None) -> _Plan:
    """Stage 1: load the library, choose cells, datatypes, output paths and tiles; refuse what cannot fit."""
    library = load_library(design.library)
    facing = resolve_facing(design.lit_from, mode=library.mode, library_lit_from=library.side,
                            library_name=library.name, where=design.source_path)
    mask = design.mask
    db_unit_nm = mask.db_unit_nm
    cell_ids, outlines = _cells_and_outlines(design, library)
    classes, lut = _datatype_table(design, cell_ids)
    grid = None
    if mask.write_field is not None:
        wf = mask.write_field
        grid = WriteFieldGrid.from_um(wf.size_um, wf.origin_um, db_unit_nm=db_unit_nm)
    complement = mask.tone == "complement"
    j0, j1 = row_range(design.aperture, design.lattice)
    sites_per_row = max(1.0, 2 * design.aperture.half_extent_um[0] / design.lattice.period_um)
    rows_per_tile = max(1, int(sites_per_tile / sites_per_row))
    tiles = [(a, min(a + rows_per_tile, j1)) for a in range(j0, j1, rows_per_tile)]
    want_gds = "gds" in mask.formats
    per_field = mask.write_field is not None and mask.write_field.cell_per_field
    mode = "complement" if complement else "fields" if per_field else mask.hierarchy
    need_groups = "oas" in mask.formats or mode != "flat"
    sites = _estimate_sites(design)
    check_bytes_per_site, streamed = check_admission_bytes_per_site(
        admitted_checks, design, sites, max_memory_bytes=max_memory_bytes,
        mapped_bytes_per_site=_gds_bytes_per_site(design, outlines, mode) if want_gds else 0.0)
    together = side_by_side(admitted_checks, streamed, sites, memory_budget(
        max_memory_bytes, fraction=COMPILE_BUDGET_FRACTION) - COMPILE_FIXED_BYTES)
    if together:  # counted at once, not one after another
        check_bytes_per_site = max(check_bytes_per_site, concurrent_bytes(admitted_checks, sites) / max(sites, 1.0))
    _check_resources(design, out, outlines, gds_mode=mode if want_gds else None,
                     check_bytes_per_site=check_bytes_per_site, max_memory_bytes=max_memory_bytes)
    emit = EmitPlan(design.name, mode, gds=want_gds, oas="oas" in mask.formats,
                    holes=complement and structures_for_checks, grid=grid if per_field else None,
                    keys=need_groups and not complement)
    level_offsets = None
    if mask.rotation_levels:
        thetas = np.arange(mask.rotation_levels) * np.pi / mask.rotation_levels
        level_offsets = [element_offsets(o, thetas, db_unit_nm) for o in outlines]  # (K, V, 2) per cell
    ctx = _TileContext(design=design, library=library, cell_ids=cell_ids, outlines=outlines,
                       level_offsets=level_offsets, layer=mask.layer("structures")[0],
                       datatypes=tuple(int(v) for v in lut), emit=emit,
                       need_groups=need_groups and not complement,
                       alias_stride=max(1, int(math.ceil(_estimate_sites(design) / ALIAS_SAMPLES))),
                       grid=grid, min_gap_db=float(library.rules.get("min_gap_nm", 0.0)) / db_unit_nm,
                       facing=facing)
    if complement:
        ctx, tiles = _complement_plan(design, ctx, outlines, grid, encode_structures=structures_for_checks)
    return _Plan(design, library, out, cell_ids, outlines, classes, lut, grid, tiles, ctx, need_groups, per_field,
                 facing, streamed, together)


def _complement_plan(design: Design, ctx: "_TileContext", outlines, grid, *, encode_structures: bool):
    """Tone inversion: the region to invert and its bands (every ``COMPLEMENT_VERIFY_EVERY``-th XOR-verified)."""
    mask = design.mask
    reach_nm = max(float(np.hypot(*o.T).max()) for o in outlines) + 2 * mask.db_unit_nm
    if grid is not None:
        reach_nm += mask.write_field.max_shift_nm
    # the same region and bands the decoder of the written pieces uses (metalay.checks.openings)
    layout = complement_layout(design, reach_nm=reach_nm)
    ctx = replace(ctx, region=layout.region, encode_structures=bool(encode_structures))
    return ctx, [(b.rows, b.box_db, k % COMPLEMENT_VERIFY_EVERY == 0) for k, b in enumerate(layout.bands)]


# ----------------------------------------------------------------------------------------------------------------
# Stage 2: tiles -> flat GDSII stream, statistics, shape groups
# ----------------------------------------------------------------------------------------------------------------

@dataclass
class _Totals:
    """Per-tile statistics summed in tile order (so the sums are the same for any thread count)."""

    n_sites: int
    per_cell: np.ndarray
    worst_snap: float = 0.0
    quant_err: float = 0.0
    alias_hits: int = 0
    alias_total: int = 0
    alias_r: list = field(default_factory=lambda: [math.inf, 0.0])
    wf_counts: dict = field(default_factory=lambda: {"straddling": 0, "shifted": 0, "dropped": 0,
                                                     "kept_straddling": 0})
    worst_shift_nm: float = 0.0
    worst_shift_phase: float = 0.0
    spin_quant: dict = field(default_factory=lambda: {1: 0.0, -1: 0.0})  # spin-decoupled: worst error per spin
    cell_phase_err: float = 0.0                                          # spin-decoupled: common cell-set error
    comp: dict = field(default_factory=lambda: {"polygons": 0, "max_vertices": 0, "area_db2": 0.0,
                                                "target_area_db2": 0.0, "xor_db2": 0.0, "xor_bound_db2": 0.0,
                                                "bands_verified": 0})

    def add(self, tile: "_TileOut") -> None:
        self.n_sites += tile.n
        self.per_cell += tile.per_cell
        self.worst_snap = max(self.worst_snap, tile.worst_snap)
        self.quant_err = max(self.quant_err, tile.quant_err)
        self.spin_quant = {k: max(v, tile.spin_quant[k]) for k, v in self.spin_quant.items()}
        self.cell_phase_err = max(self.cell_phase_err, tile.cell_phase_err)
        self.alias_hits += tile.alias_hits
        self.alias_total += tile.alias_total
        self.alias_r = [min(self.alias_r[0], tile.alias_r[0]), max(self.alias_r[1], tile.alias_r[1])]
        for k, v in tile.wf_counts.items():
            self.wf_counts[k] += v
        self.worst_shift_nm = max(self.worst_shift_nm, tile.worst_shift_nm)
        self.worst_shift_phase = max(self.worst_shift_phase, tile.worst_shift_phase)
        ct = tile.complement
        if ct is not None:
            self.comp["polygons"] += ct.count
            self.comp["max_vertices"] = max(self.comp["max_vertices"], int(ct.max_vertices))
            self.comp["area_db2"] += float(ct.area_db2)
            self.comp["target_area_db2"] += float(ct.target_area_db2)
            if ct.xor_area_db2 is not None and np.isfinite(ct.xor_area_db2):
                self.comp["xor_db2"] += float(ct.xor_area_db2)
                self.comp["xor_bound_db2"] += float(ct.xor_bound_db2)
                self.comp["bands_verified"] += 1


@dataclass
class _Gathered:
    """What the tiles leave for the manifest."""

    totals: _Totals
    keys: set = field(default_factory=set)  # distinct snapped shapes (or rotation levels) over all tiles


def _write_tiles(plan: _Plan, *, show_progress: bool | None, runner=None) -> tuple[_Gathered, dict[str, str]]:
    """Stage 2: run every tile (in worker threads, or as tasks of ``runner``), write each tile's parts into every
    output file in tile order, gather statistics; then the frame, label, marks, masters and field placements.

    Returns the gathered data and the SHA-256 of every file written (computed while writing).
    """
    design, mask = plan.design, plan.design.mask
    gathered = _Gathered(_Totals(0, np.zeros(len(plan.cell_ids), dtype=np.int64)))
    fn = _complement_tile if plan.complement else _tile
    bar = progress(total=len(plan.tiles), desc=f"{design.name}: tiles", enabled=show_progress, unit="tile")
    tiles = _run_tiles(plan.tiles, plan.ctx, fn) if runner is None else runner(plan.tiles, plan.ctx, fn, bar)
    with MaskSink(plan.ctx.emit, plan.paths, db_unit_nm=mask.db_unit_nm,
                  rotation_levels=mask.rotation_levels) as sink:
        for tile in tiles:
            if runner is None:
                bar.update(1)
            gathered.totals.add(tile)
            sink.write(tile.parts, tile.keys)
        bar.close()
        if gathered.totals.n_sites == 0:
            raise DesignError(f"{design.source_path}: no whole unit cell fits inside the aperture (allowed: "
                              f"aperture larger than one cell of period {design.lattice.period_nm:g} nm)")
        sink.finish(_extras(design, plan.library, plan.lut, plan.classes), layer=plan.ctx.layer,
                    datatypes=plan.ctx.datatypes, level_shapes=plan.ctx.level_offsets)
    gathered.keys = sink.keys
    return gathered, sink.hashes()


# ----------------------------------------------------------------------------------------------------------------
# Stage 4: the checks handed in by the caller; stage 5: the manifest
# ----------------------------------------------------------------------------------------------------------------

def _run_checks(plan: _Plan, checks: Sequence[MaskCheck], files: dict, timings: dict,
                max_memory_bytes: int | None = None, runner=None, known_hashes=None,
                children=None) -> tuple[dict, dict]:
    """Stage 4: run each enabled check on the primary mask file (one after another, side by side, or on the
    compile's cluster: :mod:`metalay.mask.checkrun`); results keyed by check name, and the report sections the
    checks handed back (``report_sections``: kept out of the manifest) keyed the same way."""
    primary = files.get("gds") or files.get("oas")
    written = WrittenMask(primary, plan.library, plan.design,
                          structures_path=plan.holes_path if plan.ctx.encode_structures else None,
                          max_memory_bytes=max_memory_bytes, sha256=(known_hashes or {}).get(primary.name))
    jobs = [CheckJob(check.name, check.run, replace(
        written, streamed=check.name in plan.streamed_checks,
        structures_path=written.structures_path if check.needs_structures else None)) for check in checks]
    on_cluster = runner is not None and bool(jobs) and all(j.written.streamed for j in jobs)  # bounded memory only
    outcomes = run_jobs(jobs, parallel=plan.checks_side_by_side, cluster=runner if on_cluster else None,
                        pool=children)
    results, sections = {}, {}
    for job, (result, seconds) in zip(jobs, outcomes):
        results[job.name] = result
        timings[f"{job.name}_s"] = seconds
    if len(jobs) > 1:
        timings["checks_run"] = "cluster" if on_cluster else "side by side" if plan.checks_side_by_side else "in turn"
    plan.holes_path.unlink(missing_ok=True)
    for key, res in results.items():  # timings are not deterministic: they go to timings.json
        if isinstance(res, dict) and "timings_s" in res:
            timings[f"{key}_stages"] = res.pop("timings_s")
        if isinstance(res, dict) and "report_sections" in res:  # report material, not manifest data
            sections[key] = res.pop("report_sections")
    return results, sections


def _process_block(plan: _Plan, totals: _Totals) -> dict:
    """The manifest's ``process`` block: bias, tone statistics, write-field counts, marks, datatypes."""
    mask = plan.design.mask
    db_unit_nm = mask.db_unit_nm
    process = {"bias_nm": mask.bias_nm, "bias_corners": mask.bias_corners, "tone": mask.tone,
               "dose_datatypes": dict(zip(plan.classes, (int(v) for v in plan.lut)))}
    if mask.write_field is not None:
        wf = mask.write_field
        process["write_field"] = {"size_um": list(wf.size_um), "origin_um": list(wf.origin_um),
                                  "cell_per_field": wf.cell_per_field,
                                  "straddle": wf.straddle, "max_shift_nm": wf.max_shift_nm,
                                  "counts": totals.wf_counts, "worst_shift_nm": round(totals.worst_shift_nm, 3),
                                  "worst_shift_phase_error_deg": round(math.degrees(totals.worst_shift_phase), 6)}
    if plan.complement:
        comp = totals.comp
        tgt = comp["target_area_db2"]
        process["complement"] = {
            "region": mask.complement_region, "polygons": comp["polygons"],
            "max_vertices": comp["max_vertices"],
            "area_relative_difference": round(abs(comp["area_db2"] - tgt) / tgt, 9) if tgt else 0.0,
            "bands": len(plan.tiles), "bands_xor_verified": comp["bands_verified"],
            "xor_area_um2": round(comp["xor_db2"] * (db_unit_nm * 1e-3) ** 2, 6),
            "xor_bound_um2": round(comp["xor_bound_db2"] * (db_unit_nm * 1e-3) ** 2, 6)}
    if mask.marks is not None:
        process["marks"] = {"kind": mask.marks.kind, "size_um": mask.marks.size_um}
    return process


def _writing_verdict(plan: _Plan, totals: _Totals) -> dict:
    """Verdicts of the writing itself: snapping and quantisation errors, elements dropped or shifted at write-field
    edges (thresholds from the design's ``[checks.limits]``, :mod:`metalay.design.limits`)."""
    limits = plan.design.checks.limits
    items = [judge(math.degrees(totals.worst_snap), limits.get("snapping_phase_error_deg"))]
    if plan.design.spin_decoupled:  # each input spin judged on its own phase error (cell set + rotation levels)
        for sigma in (1, -1):
            item = judge(math.degrees(totals.spin_quant[sigma]), limits.get("quantisation_phase_error_deg"))
            items.append({**item, "spin": sigma, "text": f"spin {sigma:+d}: {item['text']}"})
    else:
        items.append(judge(math.degrees(totals.quant_err), limits.get("quantisation_phase_error_deg")))
    if plan.facing.source == "assumed":
        items.append(unmeasured("lit_from", "assumed 'substrate': neither design.lit_from nor the library says"))
    if plan.design.mask.write_field is not None:
        dropped = totals.wf_counts["dropped"]
        total = totals.n_sites + dropped
        items.append(judge(dropped / total if total else None, limits.get("dropped_fraction")))
        items[-1]["count"] = int(dropped)
        kept = totals.wf_counts["kept_straddling"]
        items.append(judge(kept / total if total else None, limits.get("straddling_fraction")))
        items[-1]["count"] = int(kept)
        if totals.wf_counts["shifted"]:
            items.append(judge(math.degrees(totals.worst_shift_phase), limits.get("shift_phase_error_deg")))
        else:
            items.append(judge(0.0, limits.get("shift_phase_error_deg")))
        items[-1]["count"] = int(totals.wf_counts["shifted"])
    verdict = worst_verdict(i["verdict"] for i in items)
    return {"verdict": verdict, "items": items, "summary": "; ".join(i["text"] for i in items)}


def _verdicts(plan: _Plan, totals: _Totals, checks: dict) -> dict:
    """Per check and overall verdict (the worst); a check that gives no verdict counts as "warn" (never "pass")."""
    by = {"writing": _writing_verdict(plan, totals)}
    for key, res in checks.items():
        v = res.get("verdict") if isinstance(res, dict) else None
        if v is None:
            by[key] = {"verdict": "warn", "items": [unmeasured(key, "the check gave no verdict")],
                       "summary": "the check gave no verdict"}
        else:
            by[key] = {"verdict": v, "items": res.get("verdict_items", []), "summary": res.get("verdict_summary", "")}
    overall = worst_verdict(b["verdict"] for b in by.values())
    reasons = [f"{key}: {i['text']}" for key, b in by.items() for i in b["items"] if i["verdict"] == overall
               and overall != "pass"]
    return {"overall": overall, "reasons": reasons, "by_check": by, "fail_at": plan.design.checks.fail_at,
            "limits": plan.design.checks.limits.as_dict()}


def _per_spin_errors(totals: _Totals) -> dict:
    """Spin-decoupled designs: the worst phase error of each input spin (cell set and rotation levels, exact per
    site; snapping, a bound the same for both spins since it is a rotation error) and the common cell-set error."""
    snap = round(math.degrees(totals.worst_snap), 6)
    out = {f"{s:+d}": {"worst_quantisation_phase_error_deg": round(math.degrees(totals.spin_quant[s]), 6),
                       "worst_snapping_phase_error_deg": snap,
                       "worst_phase_error_bound_deg": round(math.degrees(totals.spin_quant[s]) + snap, 6)}
           for s in (1, -1)}
    out["cell_phase_error_deg"] = round(math.degrees(totals.cell_phase_err), 6)
    return out


def _manifest(plan: _Plan, gathered: _Gathered, files: dict, checks: dict, known_hashes: dict) -> dict:
    """Stage 5: the manifest (deterministic: no timings, no dates, file names relative)."""
    design, library, mask = plan.design, plan.library, plan.design.mask
    totals = gathered.totals
    alias_fraction = totals.alias_hits / max(totals.alias_total, 1)
    warnings = design_warnings(design, library, alias_fraction=alias_fraction, alias_r_min_um=totals.alias_r[0],
                               alias_r_max_um=totals.alias_r[1], facing=plan.facing)
    fill = totals.n_sites * cell_area_um2(design.lattice) / aperture_area_um2(design.aperture)
    counts = {
        "sites": int(totals.n_sites),
        "fill_factor": round(float(fill), 6),
        "elements_per_cell": {cid: int(c) for cid, c in zip(plan.cell_ids, totals.per_cell)},
        "distinct_shapes": len(gathered.keys) if plan.need_groups and not plan.complement else None,
        "tiles": len(plan.tiles),
    }
    errors = {
        "worst_snapping_phase_error_deg": round(math.degrees(totals.worst_snap), 6),
        "worst_quantisation_phase_error_deg": round(math.degrees(totals.quant_err), 6),
        "aliased_site_fraction": round(alias_fraction, 6),
    }
    if design.spin_decoupled:
        errors["per_spin"] = _per_spin_errors(totals)
    return {
        "metalay_manifest_version": 1,
        "process": _process_block(plan, totals),
        "design": {"name": design.name, "source": Path(design.source_path).name, "echo": design.raw},
        "design_hash": _design_hash(design, library),
        "library": {"name": library.name, "sha256": library.sha256, "mode": library.mode,
                    "phase_mechanism": library.phase_mechanism, "cells_used": plan.cell_ids,
                    "responses": library.provenance.get("responses_source", "")},
        "mask": {"db_unit_nm": mask.db_unit_nm, "user_unit_um": 1.0, "hierarchy": mask.hierarchy,
                 "rotation_levels": mask.rotation_levels, "layers": {k: list(v) for k, v in mask.layers}},
        "counts": counts,
        "errors": errors,
        "warnings": warnings,
        "illumination": plan.facing.as_dict(),
        "checks": checks,
        "verdicts": _verdicts(plan, totals, checks),
        "files": {fmt: {"name": p.name, "bytes": p.stat().st_size, "sha256": known_hashes.get(p.name) or _sha256(p)}
                  for fmt, p in sorted(files.items())},
        "timings_file": "timings.json",
        "caution": SAFETY_CAUTION,
    }


# ----------------------------------------------------------------------------------------------------------------
# Per-tile work (pure functions, run in worker threads)
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _TileContext:
    design: Design
    library: CellLibrary
    cell_ids: list
    outlines: list
    level_offsets: list | None
    layer: int
    datatypes: tuple
    emit: EmitPlan
    need_groups: bool
    alias_stride: int
    grid: WriteFieldGrid | None = None
    min_gap_db: float = 0.0
    region: object = None
    encode_structures: bool = False
    facing: Facing = Facing()


@dataclass
class _TileOut:
    n: int
    per_cell: np.ndarray
    parts: list              # encoded records per file and cell (metalay.mask._emit.Part)
    keys: set                # distinct shapes (or levels) of the tile
    worst_snap: float = 0.0
    quant_err: float = 0.0
    alias_hits: int = 0
    alias_total: int = 0
    alias_r: tuple = (math.inf, 0.0)
    wf_counts: dict = field(default_factory=dict)
    worst_shift_nm: float = 0.0
    worst_shift_phase: float = 0.0
    complement: object = None
    spin_quant: dict = field(default_factory=lambda: {1: 0.0, -1: 0.0})
    cell_phase_err: float = 0.0


@dataclass
class _Elements:
    """Elements of one tile after mapping, snapping and write-field fitting (arrays parallel over elements)."""

    slot: np.ndarray          # (N,) cell slot
    theta: np.ndarray         # (N,) intended rotation
    level: np.ndarray | None  # (N,) rotation level
    centres: np.ndarray       # (N, 2) int64
    offsets: list             # per slot: (N_slot, V_slot, 2) int32, in the order of np.flatnonzero(slot == k)
    snapped: list             # per slot: SnappedRows (fast record layout) or None


def _elements(rows, ctx: _TileContext, out: _TileOut, *, active_rows=None) -> _Elements | None:
    """Sites of ``rows`` -> phase -> cells -> snapped outlines (+ write-field fit). Fills ``out``'s statistics."""
    design, library = ctx.design, ctx.library
    db_unit_nm = design.mask.db_unit_nm
    sites = sample_sites(design.aperture, design.lattice, rows=rows)
    if len(sites) == 0:
        return None
    # the target phase is that of the light leaving the element, in its own frame (mirrored when it is lit from the
    # structures in transmission); the rotation sign follows the side (metalay.design.side)
    bx, by = ctx.facing.beam_xy(sites.x_um, sites.y_um)
    ncell = len(ctx.cell_ids)
    if design.spin_decoupled:
        a = _assign_spins(bx, by, ctx, out)
    else:
        phi = target_phase(design.terms, bx, by, wavelength_nm=design.wavelength_nm, sigma=design.sigma)
        a = assign_cells(phi, library, sigma=ctx.facing.rotation_sign * design.sigma,
                         cell_id=ctx.cell_ids[0] if ncell == 1 else None,
                         rotation_levels=design.mask.rotation_levels, wavelength_nm=design.wavelength_nm)
    centres = snap_centres(sites.x_um, sites.y_um, db_unit_nm)
    active = None if active_rows is None else (sites.j >= active_rows[0]) & (sites.j < active_rows[1])
    out.quant_err = max(out.quant_err, a.quantisation_error_rad)
    _alias_estimate(sites, active, ctx, out)
    slot = a.cell_index.astype(np.int64) if ncell > 1 else np.zeros(len(sites), np.int64)
    offsets, snapped = _snap_cells(a, slot, ctx, out)
    keep = np.ones(len(sites), bool) if active is None else active.copy()
    if ctx.grid is not None:
        centres, fit_keep = _fit_fields(sites, centres, offsets, slot, active, keep, ctx, out)
        keep &= fit_keep
    if not keep.all():
        offsets = [o[keep[slot == k] if ncell > 1 else keep] for k, o in enumerate(offsets)]
        snapped = [None] * ncell  # the row layout no longer matches: records come from the offsets
        centres = centres[keep]
        slot = slot[keep]
        theta = a.rotation_rad[keep]
        level = a.level[keep] if a.level is not None else None
    else:
        theta, level = a.rotation_rad, a.level
    if ctx.grid is not None:
        snapped = [None] * ncell  # centres may have moved: records come from the offsets
    out.n += int(keep.sum())
    return _Elements(slot, theta, level, centres, offsets, snapped)


def _assign_spins(bx, by, ctx: _TileContext, out: _TileOut):
    """Spin-decoupled mapping of one tile (:func:`metalay.mask.spinmap.assign_spin_cells`) at the leaving light's
    coordinates ``(bx, by)``; records the worst error of each spin and the common cell-set error."""
    design = ctx.design
    (_, terms_plus), (_, terms_minus) = design.spin_targets()
    phi_plus = target_phase(terms_plus, bx, by, wavelength_nm=design.wavelength_nm, sigma=1)
    phi_minus = target_phase(terms_minus, bx, by, wavelength_nm=design.wavelength_nm, sigma=-1)
    a = assign_spin_cells(phi_plus, phi_minus, ctx.library, wavelength_nm=design.wavelength_nm,
                          rotation_levels=design.mask.rotation_levels, rotation_sign=ctx.facing.rotation_sign)
    out.spin_quant = {k: max(v, a.spin_error_rad[k]) for k, v in out.spin_quant.items()}
    out.cell_phase_err = max(out.cell_phase_err, a.cell_phase_error_rad)
    return a


def _alias_estimate(sites, active, ctx: _TileContext, out: _TileOut) -> None:
    """Count sites where the phase changes by more than pi per period, on a deterministic sub-sample."""
    design = ctx.design
    own = slice(None) if active is None else active
    xs, ys = ctx.facing.beam_xy(sites.x_um[own][::ctx.alias_stride], sites.y_um[own][::ctx.alias_stride])
    hit = np.zeros(xs.shape, bool)
    for sigma, terms in design.spin_targets():  # one phase per input spin the design writes (1 or 2)
        g = phase_gradient(terms, xs, ys, wavelength_nm=design.wavelength_nm, sigma=sigma,
                           step_um=design.lattice.period_um * 1e-3)
        hit |= g * design.lattice.period_um > np.pi
    out.alias_total += int(hit.size)
    if hit.any():
        out.alias_hits += int(hit.sum())
        r = np.hypot(xs[hit], ys[hit])
        out.alias_r = (min(out.alias_r[0], float(r.min())), max(out.alias_r[1], float(r.max())))


def _snap_cells(a, slot, ctx: _TileContext, out: _TileOut):
    """Snapped outlines per cell slot (rotation levels or exact rotations) and the worst snapping phase error."""
    library = ctx.library
    db_unit_nm = ctx.design.mask.db_unit_nm
    ncell = len(ctx.cell_ids)
    # the (N, V, 2) layout is only built when something needs it; GDSII records come from the row layout
    need_offsets = ctx.grid is not None or ctx.need_groups or ctx.region is not None
    offsets = []
    snapped = []
    for k in range(ncell):  # loop over cells (short axis)
        sel = np.flatnonzero(slot == k) if ncell > 1 else slice(None)
        cell = library.cells[library.cell_index(ctx.cell_ids[k])]
        if ctx.level_offsets is not None:
            offsets.append(ctx.level_offsets[k][a.level[sel]])
            snapped.append(None)
            if not is_rotation_invariant(cell):
                err = np.abs(wrap_pi(2.0 * (recovered_rotation(ctx.level_offsets[k]) - np.arange(
                    len(ctx.level_offsets[k])) * np.pi / len(ctx.level_offsets[k]))))
                out.worst_snap = max(out.worst_snap, float(err.max()))
        else:
            sr = snap_rows(ctx.outlines[k], a.rotation_rad[sel], db_unit_nm)
            snapped.append(sr)
            offsets.append(sr.offsets() if need_offsets else None)
            if not is_rotation_invariant(cell):
                out.worst_snap = max(out.worst_snap, sr.error_rad)
    return offsets, snapped


def _fit_fields(sites, centres, offsets, slot, active, keep, ctx: _TileContext, out: _TileOut):
    """Fit elements into write fields (shift, drop or keep straddlers); counts, worst shift and its phase error.

    Returns the fitted centres and which elements are kept.
    """
    design = ctx.design
    wf = design.mask.write_field
    db_unit_nm = design.mask.db_unit_nm
    ncell = len(ctx.cell_ids)
    vmax = max(o.shape[1] for o in offsets)
    padded = np.empty((len(sites), vmax, 2), np.int32)
    for k, o in enumerate(offsets):  # pad with the last vertex (same hull) so all cells share one array
        sel = np.flatnonzero(slot == k) if ncell > 1 else slice(None)
        padded[sel, :o.shape[1]] = o
        padded[sel, o.shape[1]:] = o[:, -1:, :]
    fit = fit_write_fields(centres, padded, ctx.grid, mode=wf.straddle, max_shift_db=wf.max_shift_nm / db_unit_nm,
                           min_gap_db=ctx.min_gap_db, active=active)
    for key, val in (("straddling", fit.n_straddling), ("shifted", fit.n_shifted), ("dropped", fit.n_dropped),
                     ("kept_straddling", fit.n_kept_straddling)):
        out.wf_counts[key] = out.wf_counts.get(key, 0) + int(val)
    moved = np.flatnonzero(np.any(fit.shift_db != 0, axis=1) & keep)
    if moved.size:
        shift_nm = np.hypot(*fit.shift_db[moved].T.astype(np.float64)) * db_unit_nm
        out.worst_shift_nm = max(out.worst_shift_nm, float(shift_nm.max()))
        for sigma, terms in design.spin_targets():  # one phase per input spin the design writes (1 or 2)
            gm = phase_gradient(terms, *ctx.facing.beam_xy(sites.x_um[moved], sites.y_um[moved]),
                                wavelength_nm=design.wavelength_nm, sigma=sigma,
                                step_um=design.lattice.period_um * 1e-3)
            err = shift_phase_error_rad(fit.shift_db[moved], gm, db_unit_nm=db_unit_nm)
            out.worst_shift_phase = max(out.worst_shift_phase, float(np.max(err, initial=0.0)))
    return fit.centres_db, fit.keep


def _tile(rows, ctx: _TileContext) -> _TileOut:
    """All per-site work of one tile (a band of lattice rows): a pure function, safe to run in a worker thread or
    as a task on another machine; the output files' records come back encoded (:mod:`metalay.mask._emit`)."""
    ncell = len(ctx.cell_ids)
    out = _TileOut(0, np.zeros(ncell, np.int64), [], set())
    halo = 1 if ctx.grid is not None else 0  # write-field fitting needs the neighbours across the tile edge
    el = _elements((rows[0] - halo, rows[1] + halo), ctx, out, active_rows=rows if halo else None)
    if el is None:
        return out
    slots = []
    for k in range(ncell):  # loop over cells (short axis)
        sel = np.flatnonzero(el.slot == k) if ncell > 1 else slice(None)
        n_k = el.theta[sel].size
        if n_k == 0:
            continue
        out.per_cell[k] = n_k
        slots.append(SlotElements(k, ctx.datatypes[k], el.centres[sel], el.offsets[k], el.snapped[k],
                                  el.level[sel] if el.level is not None else None))
    out.parts, out.keys = emit_elements(ctx.emit, ctx.layer, slots, where=str(ctx.design.source_path))
    return out


def _complement_tile(task, ctx: _TileContext) -> _TileOut:
    """One band of the tone inversion: the region minus the band's elements, as hole-free polygons."""
    rows, box_db, verify = task
    ncell = len(ctx.cell_ids)
    out = _TileOut(0, np.zeros(ncell, np.int64), [], set())
    holes = []
    el = _elements(rows, ctx, out)
    if el is None:
        centres = np.zeros((0, 2), np.int64)
        offsets = np.zeros((0, 4, 2), np.int32)
    else:
        centres = el.centres
        vmax = max(o.shape[1] for o in el.offsets)
        offsets = np.empty((len(centres), vmax, 2), np.int32)
        for k, o in enumerate(el.offsets):
            sel = np.flatnonzero(el.slot == k) if ncell > 1 else slice(None)
            offsets[sel, :o.shape[1]] = o
            offsets[sel, o.shape[1]:] = o[:, -1:, :]
        # count only the elements whose centre lies in this band's box (bands overlap by their halo rows)
        inside = (centres[:, 1] >= box_db[1]) & (centres[:, 1] < box_db[3])
        out.n = int(inside.sum())
        out.per_cell = np.bincount(el.slot[inside], minlength=ncell).astype(np.int64)
        if ctx.encode_structures:  # the holes themselves, for the design-rule check of the cells
            for k, o in enumerate(el.offsets):
                own = inside[el.slot == k] if ncell > 1 else inside
                c_k = centres[el.slot == k] if ncell > 1 else centres
                holes.append(SlotElements(k, ctx.datatypes[k], c_k[own], o[own]))
    cuts = None
    grid = ctx.grid
    if grid is not None:
        x0, x1 = box_db[0], box_db[2]
        k0 = math.floor((x0 - grid.origin_db[0]) / grid.size_db[0])
        k1 = math.ceil((x1 - grid.origin_db[0]) / grid.size_db[0])
        cuts = grid.origin_db[0] + grid.size_db[0] * np.arange(k0, k1 + 1)
    out.complement = complement_tile(centres, offsets, ctx.region, box_db, cut_x_db=cuts, verify=verify)
    out.parts = emit_complement(ctx.emit, ctx.layer, ctx.datatypes[len(ctx.cell_ids)], out.complement, holes=holes,
                                where=str(ctx.design.source_path))
    return out


def _run_tiles(tiles, ctx: _TileContext, fn=_tile):
    """Yield ``fn(tile, ctx)`` in order, computing up to ``workers`` tiles ahead in threads (bounded memory)."""
    workers = max(1, min(2, os.cpu_count() or 1))
    if workers == 1 or len(tiles) == 1:
        for t in tiles:
            yield fn(t, ctx)
        return
    with ThreadPoolExecutor(max_workers=workers) as pool:
        pending = collections.deque()
        for t in tiles:
            pending.append(pool.submit(fn, t, ctx))
            if len(pending) > workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


#: Measured peak memory per site of the compile's own stages (``bench/bench_admission.py``: the larger of the
#: virtual-size and the resident-size slope between 1e6 and 4e6 sites, rounded up; figures in DEVELOPERS.md).
#: Every output (flat or hierarchical GDSII, OASIS) is streamed tile by tile (measured 20.5 virtual, 27.0
#: resident for flat GDSII; the OASIS and hierarchical outputs keep nothing per site past their tile):
LAYOUT_BYTES_PER_SITE = 30
#: ... up to this many sites: past it the layout's peak stops growing (nothing is held per site past its tile; the
#: slope above is tiles coming into flight and the allocator's arenas filling). ``bench/bench_scale.py`` measured
#: the peak resident memory of a flat-GDSII compile at 176 MB (1e6 sites), 239 MB (1e7) and 275 MB (1e8), and of
#: an OASIS compile at 168, 179 and 186 MB: below 460 MB + 30 B x 1e7 = 760 MB at every size.
LAYOUT_PLATEAU_SITES = 10_000_000
#: What a compile needs whatever its size: interpreter and libraries loaded later (plots), tiles in flight (about
#: 3 x 250,000 sites), thread stacks and allocator arenas (largest intercept measured: 452 MB).
COMPILE_FIXED_BYTES = 460_000_000
#: Share of the least memory limit a compile may plan to use: its constants are measured peaks (temporaries
#: included), so the slack is smaller than the readers' default of one half.
COMPILE_BUDGET_FRACTION = 0.8
#: Bytes per element of the GDSII outputs: a flat 4-vertex BOUNDARY is 64 B (4 * (1 + 3 + 1 + 2 * (V + 1) + 1));
#: a hierarchical SREF is 4 + (4 + name) + 12 + 4 B.
_SREF_FIXED_BYTES = 24


def compile_memory_bytes(sites: float, *, check_bytes_per_site: float = 0.0) -> dict:
    """Estimated peak memory of a compile of ``sites`` lattice sites, per stage and in total (bytes).

    The stages run one after another and freed memory is reused, so the peak is the largest of them:
    ``fixed + max(layout, checks)`` with layout 30 B per site up to 1e7 sites and constant beyond (every output
    format is streamed tile by tile; :data:`LAYOUT_PLATEAU_SITES`) and checks the largest
    :attr:`~metalay.mask.steps.MaskCheck.bytes_per_site` of the enabled checks times the sites (design rules
    300 B, optics 220 B). Constants measured by ``bench/bench_admission.py`` and ``bench/bench_scale.py``.

    Returns
    -------
    dict
        ``layout``, ``checks``, ``fixed`` and ``total`` in bytes.
    """
    parts = {"layout": LAYOUT_BYTES_PER_SITE * min(sites, LAYOUT_PLATEAU_SITES),
             "checks": float(check_bytes_per_site) * sites,
             "fixed": float(COMPILE_FIXED_BYTES)}
    parts["total"] = parts["fixed"] + max(parts["layout"], parts["checks"])
    return {k: int(v) for k, v in parts.items()}


def check_admission_bytes_per_site(checks: Sequence[MaskCheck], design: Design, sites: float, *,
                                   max_memory_bytes: int | None = None,
                                   mapped_bytes_per_site: float = 0.0) -> tuple[float, frozenset]:
    """Bytes per site the memory admission counts for the checks, and the names of the checks that must stream.

    A check counts its whole-mask figure (:attr:`MaskCheck.bytes_per_site`) when the compile's fixed part plus that
    fits the compile's budget (:data:`COMPILE_BUDGET_FRACTION` of the least memory limit, or ``max_memory_bytes``)
    and the mask has at most :attr:`MaskCheck.stream_above_sites` sites; otherwise, when it has a streamed method
    for this design and that needs less, its streamed figure (:attr:`MaskCheck.streamed_bytes_per_site` plus its
    fixed part spread over the sites) and the compile tells the step to stream (:attr:`WrittenMask.streamed`).
    Under an address-space limit (``ulimit -v``) the streamed read's mapping of the GDSII file
    (``mapped_bytes_per_site``) counts too.

    Returns
    -------
    (float, frozenset of str)
        The largest figure over ``checks`` (0 without checks) and the checks to stream.
    """
    budget = memory_budget(max_memory_bytes, fraction=COMPILE_BUDGET_FRACTION) - COMPILE_FIXED_BYTES
    mapped = mapped_bytes_per_site if memory_limits().binding.startswith("address-space") else 0.0
    need, streamed = [0.0], set()
    for c in checks:
        whole = c.bytes_per_site
        stream = (None if c.streamed_bytes_per_site is None or not c.streams(design) else
                  c.streamed_bytes_per_site + c.streamed_fixed_bytes / max(sites, 1.0) + mapped)
        if stream is None or stream >= whole or (whole * sites <= budget and sites <= c.stream_above_sites):
            need.append(whole)
        else:
            need.append(stream)
            streamed.add(c.name)
    return max(need), frozenset(streamed)


def _gds_bytes_per_site(design: Design, outlines, gds_mode: str) -> float:
    """Bytes per element of the GDSII mask file in layout ``gds_mode`` (upper bound, for the disk check)."""
    if gds_mode == "levels":
        name = len(design.name) + 6
        return _SREF_FIXED_BYTES + name + name % 2
    vertices = max(len(o) for o in outlines)
    return 4 * (1 + 3 + 1 + 2 * (vertices + 1) + 1)


def _check_resources(design: Design, out: Path, outlines, *, gds_mode: str | None,
                     check_bytes_per_site: float = 0.0, max_memory_bytes: int | None = None) -> None:
    """Refuse, before writing anything, a compile that cannot fit the memory this process may use or the disk."""
    sites = _estimate_sites(design)
    where = design.source_path
    need = compile_memory_bytes(sites, check_bytes_per_site=check_bytes_per_site)
    budget = memory_budget(max_memory_bytes, fraction=COMPILE_BUDGET_FRACTION)
    if need["total"] > budget:
        if max_memory_bytes is not None:
            why = "--max-memory"
        else:
            limits = memory_limits()
            why = (f"{COMPILE_BUDGET_FRACTION:.0%} of the {limits.binding}, "
                   f"{format_bytes(limits.least_bytes)} free")
        hints = []
        if check_bytes_per_site and compile_memory_bytes(sites)["total"] <= budget:
            hints.append("--no-checks (or [checks] rules/optics = false), then check the mask on its own")
        hints.append("a smaller aperture or a larger --max-memory")
        raise DesignError(
            f"{where}: about {sites:.3g} sites need about {format_bytes(need['total'])} of memory (fixed "
            f"{format_bytes(need['fixed'])}, layout {format_bytes(need['layout'])}, checks "
            f"{format_bytes(need['checks'])}), more than the budget of {format_bytes(budget)} ({why}); allowed "
            f"here: {'; or '.join(hints)}")
    if gds_mode is not None:
        need_disk = sites * _gds_bytes_per_site(design, outlines, gds_mode)
        free = shutil.disk_usage(out).free
        if need_disk > free:
            raise OutputError(f"{out}: the GDSII file of about {sites:.3g} sites needs about "
                              f"{format_bytes(need_disk)} but the disk has {format_bytes(free)} free; free space or "
                              "choose another output folder")


def _rounded(obj):
    """Timings for timings.json: floats rounded to milliseconds, nested dicts and lists kept."""
    if isinstance(obj, dict):
        return {str(k): _rounded(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_rounded(v) for v in obj]
    if isinstance(obj, float):
        return round(obj, 3)
    return obj


def _estimate_sites(design: Design) -> float:
    return estimated_sites(design.aperture, design.lattice)


def _extras(design: Design, library: CellLibrary, lut=None, classes=None):
    """Frame, label and alignment marks (a handful of polygons)."""
    mask = design.mask
    db_unit_nm = mask.db_unit_nm
    hw, hh = design.aperture.half_extent_um

    def dt(purpose):
        return int(lut[classes.index(purpose)]) if lut is not None else mask.layer(purpose)[1]

    fl, _ = mask.layer("frame")
    polys = frame_polygons(hw, hh, margin_um=mask.frame_margin_um, width_um=mask.frame_width_um,
                           db_unit_nm=db_unit_nm, layer=fl, datatype=dt("frame"))
    if mask.label:
        ll, _ = mask.layer("label")
        text = f"{design.name} {_design_hash(design, library)[:8]}"
        x = -hw - mask.frame_margin_um - mask.frame_width_um
        y = -hh - mask.frame_margin_um - mask.frame_width_um - 1.5 * mask.label_height_um
        polys += text_polygons(text, height_um=mask.label_height_um, x_um=x, y_um=y, db_unit_nm=db_unit_nm,
                               layer=ll, datatype=dt("label"))
    if mask.marks is not None:
        mk = mask.marks
        positions = mk.positions_um or default_mark_positions_um(
            design.aperture, frame_margin_um=mask.frame_margin_um, frame_width_um=mask.frame_width_um,
            size_um=mk.size_um, gap_um=mk.gap_um)
        marks = alignment_marks(mk.kind, positions, size_um=mk.size_um, line_width_um=mk.line_width_um,
                                db_unit_nm=db_unit_nm, layer=mask.layer("marks")[0], datatype=dt("marks"))
        keepout = frame_region_db(design.aperture, margin_um=mask.frame_margin_um + mask.frame_width_um,
                                  db_unit_nm=db_unit_nm)
        check_marks_clear(marks, keepout, where=design.source_path)
        polys += marks
    return polys


def _summary(design: Design, library: CellLibrary, manifest: dict, files: dict) -> list[str]:
    c = manifest["counts"]
    e = manifest["errors"]
    shapes = "" if c["distinct_shapes"] is None else f", {c['distinct_shapes']} distinct snapped shapes"
    lines = [
        f"design {design.name}: {c['sites']:,} sites, fill factor {c['fill_factor']:.3f}{shapes}",
        f"library {library.name} ({library.mode}, {library.phase_mechanism} phase), cell(s) "
        f"{', '.join(manifest['library']['cells_used'])}",
        f"worst phase error: snapping {e['worst_snapping_phase_error_deg']:.3f} deg, quantisation "
        f"{e['worst_quantisation_phase_error_deg']:.3f} deg",
    ]
    if "per_spin" in e:
        ps = e["per_spin"]
        per = ", ".join(f"spin {k} {ps[k]['worst_quantisation_phase_error_deg']:.3f} + "
                        f"{ps[k]['worst_snapping_phase_error_deg']:.3f} deg" for k in ("+1", "-1"))
        lines.append(f"per input spin (cell set + rotation levels, snapping): {per}; common cell-set error "
                     f"{ps['cell_phase_error_deg']:.3f} deg")
    for info in manifest["files"].values():
        lines.append(f"wrote {info['name']} ({info['bytes'] / 1e6:.2f} MB, sha256 {info['sha256'][:12]})")
    for records in manifest.get("derived", {}).values():
        lines.extend(r["summary"] for r in records if isinstance(r, dict) and "summary" in r)
    lines.append(f"illumination: lit from the {manifest['illumination']['lit_from']} ({library.mode}; "
                 f"{'mirrored' if manifest['illumination']['mirrored_y'] else 'not mirrored'} in the file)")
    verdicts = manifest["verdicts"]
    wv = verdicts["by_check"]["writing"]
    lines.append(f"writing: {wv['verdict'].upper()}")
    lines.extend(f"  {i['text']}" for i in wv["items"])
    for key, res in manifest["checks"].items():
        summary = res.get("summary", "")
        verdict = verdicts["by_check"][key]["verdict"]
        status = res.get("status", "?")
        head = f"{key} check: {verdict.upper()}" + ("" if status == verdict else f" ({status})")
        if isinstance(summary, (list, tuple)):
            lines.append(head)
            lines.extend(f"  {line}" for line in summary)
        else:
            lines.append(f"{head} {summary}".rstrip())
        lines.extend(f"  {i['text']}" for i in verdicts["by_check"][key]["items"] if i["verdict"] != "pass")
    for w in manifest["warnings"]:
        lines.append(f"warning: {w}")
    why = f": {'; '.join(verdicts['reasons'])}" if verdicts["reasons"] else ""
    lines.append(f"verdict: {verdicts['overall'].upper()}{why}")
    return lines
