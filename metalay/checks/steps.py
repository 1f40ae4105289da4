"""The checks a compile runs on the mask it wrote, as :class:`~metalay.mask.steps.MaskCheck` steps.

:func:`default_checks` assembles the standard set (design rules, then the quick optical check); the compile
receives it as an argument (:func:`metalay.mask.compile.compile_mask`), so the checks depend on the mask stages and
never the other way round. :func:`metalay.api.compile_design` and the command line pass this set.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np

from metalay.checks.rules import check_mask, rules_from_library
from metalay.checks.rules_stream import check_mask_tiled
from metalay.design.lattice import estimated_sites
from metalay.design.limits import judge
from metalay.design.spec import Design
from metalay.io.gdsread import mask_format
from metalay.mask.process import WriteFieldGrid
from metalay.mask.steps import MaskCheck, WrittenMask
from metalay.util.budget import memory_budget

__all__ = ["default_checks", "rules_step", "optics_step", "run_rules_on_written", "run_optics_on_written",
           "prepare_check_process",
           "compile_report_step", "rule_margins_window"]

#: Vertex limit of the written pieces of a tone inversion (GDSII allows 8191 points, the last repeats the first).
_PIECE_MAX_VERTICES = 8190
#: Peak memory per lattice site of each check run by a compile, for its memory admission (``bench/bench_admission.py``:
#: the larger of the virtual and resident slope between 1e6 and 4e6 sites, measured 288 and 214, rounded up).
RULES_BYTES_PER_SITE = 300
OPTICS_BYTES_PER_SITE = 220
#: Peak memory per site of the streamed checks beyond one band or block grid: the GDSII file walk's per-element
#: table and resident pages, about 25 B per polygon measured at 1e7 polygons (``bench/bench_stream_checks.py``;
#: ``rules_stream._READER_BYTES_PER_POLYGON``); the OASIS stream holds less (docs/scale-checks.md). The compile's
#: admission counts this figure for a check it tells to stream (and, under an address-space limit, the mapped GDSII
#: file on top: :func:`metalay.mask.compile.check_admission_bytes_per_site`).
STREAMED_BYTES_PER_SITE = 30
#: Memory of a streamed check that does not grow with the mask: measured peaks of 317 MB (rules, 30 bands) and
#: 298 MB (optics) at 1e7 sites, of which about 160-250 MB is the table above (``bench/bench_stream_checks.py``, docs/
#: scale-checks.md); rounded up with room for the band spill buffers.
STREAMED_FIXED_BYTES = 300_000_000
#: Above this many sites a compile streams its checks even when the whole mask would fit: the whole-mask checks
#: need 300 and 220 B per site (1.2 GB and 0.9 GB at 4e6 sites, 2.9 GB with the layout at 1e7, over issue 15's
#: 1.5 GB), the streamed ones 30 B per site + 300 MB, and streamed they took 0.74x (rules) and 0.26x (optics) of
#: the whole-mask time at 1e6 sites (docs/scale-checks.md). The streamed optics reads the fringe image from the
#: near field averaged over blocks of a few cells (at most 512 per side).
STREAM_CHECKS_ABOVE_SITES = 4_000_000
#: Smallest bytes per polygon of a GDSII/OASIS file (an upper bound on the polygon count from the file size).
_MIN_FILE_BYTES_PER_POLYGON = 8


def whole_mask_fits(path, layers, bytes_per_site: float, max_memory_bytes: int | None) -> bool:
    """Whether the whole-mask method of a check (``bytes_per_site`` per polygon on ``layers``) fits the budget.

    A cheap bound from the file size first; the exact count (the file walk, no flattening) only when needed.
    """
    from metalay.io.stream_read import count_polygons

    budget = memory_budget(max_memory_bytes)
    try:
        size = Path(path).stat().st_size
    except OSError:
        return True  # missing or unreadable: the whole-mask read reports it in one line
    if size / _MIN_FILE_BYTES_PER_POLYGON * bytes_per_site <= budget:
        return True
    return count_polygons(path, layers=layers)[0] * bytes_per_site <= budget


def _rules_report(path, rules, max_memory_bytes: int | None, streamed: bool = False, sites: float = 0.0,
                  sha256: str | None = None):
    """The rule report and the method used: whole-mask when it fits the budget (and the compile did not ask to
    stream), else band by band (``sites``: the design's estimate, for the memory the bands may use; ``sha256``:
    the file's digest when the compile computed it while writing)."""
    if not streamed and whole_mask_fits(path, rules.layer_pairs(), RULES_BYTES_PER_SITE, max_memory_bytes):
        return check_mask(path, rules, max_memory_bytes=max_memory_bytes), {"method": "whole-mask"}
    # streamed: the memory the admission counted, not all the memory there is. The tiled check gives half its budget
    # to a band, less the reader's table when it sweeps the bands in memory (GDSII written in row order); the OASIS
    # stream holds no such table and its bands go through band files, so it gets twice the fixed part only (a 1e8-site
    # OASIS check peaked at 2.7 GB with 14 bands sized from all the memory there was)
    reader = STREAMED_BYTES_PER_SITE * sites if mask_format(path) == "GDSII" else 0.0
    band_bytes = min(memory_budget(max_memory_bytes), int(2 * (reader + STREAMED_FIXED_BYTES)))
    report, plan = check_mask_tiled(path, rules, max_memory_bytes=band_bytes, spill_dir=Path(path).parent,
                                    known_sha256=sha256)
    return report, plan.as_dict(report.db_unit_nm)


def _switch(setting: str, forced: bool | None):
    """``enabled`` of a step: the design's ``[checks]`` setting, unless forced on."""
    if forced:
        return lambda design: True

    def from_design(design: Design) -> bool:
        return bool(getattr(design.checks, setting))
    return from_design


def rules_step(*, force: bool | None = None) -> MaskCheck:
    """The design-rule check step (:func:`run_rules_on_written`); on when ``[checks] rules`` is (or ``force``)."""
    return MaskCheck("rules", run_rules_on_written, _switch("rules", force), needs_structures=True,
                     bytes_per_site=RULES_BYTES_PER_SITE, streamed_bytes_per_site=STREAMED_BYTES_PER_SITE,
                     streamed_fixed_bytes=STREAMED_FIXED_BYTES, stream_above_sites=STREAM_CHECKS_ABOVE_SITES)


def _optics_streams(design: Design) -> bool:
    """The streamed optical check covers one-phase masks in structures tone (not spin-decoupled nor complement)."""
    return not getattr(design, "spin_decoupled", False) and design.mask.tone != "complement"


def optics_step(*, force: bool | None = None) -> MaskCheck:
    """The quick optical check step (:func:`run_optics_on_written`); on when ``[checks] optics`` is (or ``force``)."""
    return MaskCheck("optics", run_optics_on_written, _switch("optics", force), bytes_per_site=OPTICS_BYTES_PER_SITE,
                     streamed_bytes_per_site=STREAMED_BYTES_PER_SITE, streamed_fixed_bytes=STREAMED_FIXED_BYTES,
                     streams=_optics_streams, stream_above_sites=STREAM_CHECKS_ABOVE_SITES)


def default_checks(*, rules: bool | None = None, optics: bool | None = None) -> tuple[MaskCheck, ...]:
    """The standard checks of ``metalay compile``: design rules, then optics.

    Parameters
    ----------
    rules, optics : bool or None
        None: as the design's ``[checks]`` table says; True: run regardless; False: leave the step out.

    Returns
    -------
    tuple of MaskCheck
        Pass to :func:`metalay.mask.compile.compile_mask` as ``checks``.
    """
    steps = []
    if rules is not False:
        steps.append(rules_step(force=rules))
    if optics is not False:
        steps.append(optics_step(force=optics))
    return tuple(steps)


def _library_ruleset(written: WrittenMask):
    """The library's default rules for this mask: every structure datatype, the frame, square write fields."""
    library, mask = written.library, written.design.mask
    wf = mask.write_field
    square = wf is not None and abs(wf.size_um[0] - wf.size_um[1]) < 1e-12
    base = rules_from_library(dict(library.rules), layer=mask.layer("structures"),
                              film_height_nm=library.film_height_nm, frame_layer=mask.layer("frame"),
                              write_field_um=wf.size_um[0] if square else None)
    if square:  # the same grid compile used: origin and size rounded to the database grid
        g = WriteFieldGrid.from_um(wf.size_um, wf.origin_um, db_unit_nm=mask.db_unit_nm)
        to_um = mask.db_unit_nm / 1000.0
        base = replace(base, write_field_um=g.size_db[0] * to_um,
                       write_field_centre_um=((g.origin_db[0] + g.size_db[0] / 2) * to_um,
                                              (g.origin_db[1] + g.size_db[1] / 2) * to_um))
    datatypes = sorted({int(v) for k, v in dict(mask.dose_datatypes).items()
                        if k not in ("complement", "frame", "label", "marks")} | {mask.layer("structures")[1]})
    template = base.layers[0]

    def ruleset(**changes):
        return replace(base, layers=tuple(replace(template, datatype=dt, **changes) for dt in datatypes))
    return ruleset


def run_rules_on_written(written: WrittenMask) -> dict:
    """The library's default rules on the mask just written (every structure datatype, frame enclosure, and the
    write field when the design has square fields); a manifest-ready dict.

    For tone "complement" the written pieces touch along their cut lines by construction, so on them only grid,
    validity, vertex count and frame enclosure apply; the feature, gap and aspect rules of the cells are checked
    on the structures themselves (the holes), written to ``written.structures_path`` for the purpose.
    """
    path, mask = written.path, written.design.mask
    ruleset = _library_ruleset(written)
    out = {}
    budget = written.max_memory_bytes
    design = written.design
    sites = estimated_sites(design.aperture, design.lattice)
    if written.structures_path is None:
        report, method = _rules_report(path, ruleset(), budget, written.streamed, sites, written.sha256)
    else:
        report, method = _rules_report(written.structures_path, ruleset(inside_frame=None), budget, written.streamed,
                                       sites)
        piece_rules = ruleset(min_width_nm=None, min_spacing_nm=None, forbid_overlap=False, film_height_nm=None,
                              max_aspect_ratio=None, no_field_straddle=False, max_vertices=_PIECE_MAX_VERTICES)
        complement_dt = dict(mask.dose_datatypes).get("complement")
        pieces, _ = _rules_report(path, replace(piece_rules, layers=tuple(
            replace(lr, datatype=int(lr.datatype if complement_dt is None else complement_dt))
            for lr in piece_rules.layers)), budget, written.streamed, sites, written.sha256)
        out["complement_pieces"] = {"status": "clean" if pieces.clean else "violations",
                                    "violations": pieces.total_violations, "summary": pieces.summary_lines()}
        out["note"] = ("tone 'complement': feature, gap and aspect rules checked on the structures (the holes); "
                       "grid, validity, vertex count and frame enclosure on the written pieces")
    d = report.to_dict(max_listed=20)
    d["mask"] = Path(path).name  # relative: the file is checked in the staging folder before it is moved
    d["method"] = method
    d.update(out)
    total = report.total_violations + out.get("complement_pieces", {}).get("violations", 0)
    d["status"] = "clean" if total == 0 else "violations"
    d["violations"] = total
    d["summary"] = report.summary_lines() + [f"pieces: {line}" for line in
                                             out.get("complement_pieces", {}).get("summary", [])]
    d["timings_s"] = {k: round(v, 3) for k, v in report.timings_s}
    item = judge(total, written.design.checks.limits.get("rule_violations"))
    d["verdict"], d["verdict_items"], d["verdict_summary"] = item["verdict"], [item], item["text"]
    return d


def prepare_check_process() -> None:
    """Load what the checks of this module import when they run (the optical checks and the plotting stack): called
    in a check's child process while the compile still writes the mask (:mod:`metalay.mask.checkrun`)."""
    from metalay.checks import optics_stream, plots  # noqa: F401


def run_optics_on_written(written: WrittenMask) -> dict:
    """The quick optical check of the mask just written (:func:`metalay.checks.optics.compile_check`)."""
    from metalay.checks import optics  # imported when the step runs: it pulls in the FFT and plotting stack

    if getattr(written.design, "spin_decoupled", False):  # a phase per input spin: both spins are checked
        from metalay.checks.spinoptics import compile_spin_check

        return compile_spin_check(written.path, written.library, written.design)
    layer = written.design.mask.layer("structures")
    if not _optics_streams(written.design) or (
            not written.streamed
            and whole_mask_fits(written.path, [layer], OPTICS_BYTES_PER_SITE, written.max_memory_bytes)):
        d = optics.compile_check(written.path, written.library, written.design)
        d["method"] = {"method": "whole-mask"}
        return d
    from metalay.checks.optics_stream import compile_check_streamed

    return compile_check_streamed(written.path, written.library, written.design, mask_sha256=written.sha256)


# ----------------------------------------------------------------------------------------------------------------
# The compile report (written after the manifest: it shows the verdicts)
# ----------------------------------------------------------------------------------------------------------------

#: Largest site count for which the report reads the structures again to measure rule margins on a window.
REPORT_MARGIN_SITES = 5_000_000
#: Polygons of the window the margins are measured on (the ones nearest the structures' middle).
MARGIN_WINDOW_POLYGONS = 2000


def _purpose_pairs(written: WrittenMask, manifest: dict) -> dict:
    """(layer, datatype) of each purpose as written (dose datatypes applied)."""
    mask = written.design.mask
    dts = manifest.get("process", {}).get("dose_datatypes", {})
    out = {}
    for purpose in ("structures", "frame", "label", "marks"):
        layer, dt = mask.layer(purpose)
        out[purpose] = (int(layer), int(dts.get(purpose, dt)))
    return out


def rule_margins_window(flat, ruleset, *, period_nm: float, polygons: int = MARGIN_WINDOW_POLYGONS) -> dict:
    """How far the width, spacing and aspect-ratio rules are from failing, measured on a window of polygons.

    The rules are re-run with limits every polygon fails (width 1e7 nm, spacing one lattice period, aspect ratio
    1e-9), so :func:`metalay.checks.rules.check_mask` reports the measured extreme of each quantity over the
    ``polygons`` polygons nearest the middle of the layer (their neighbours included).

    Returns
    -------
    dict
        ``window_polygons`` and per rule ``limit``, ``measured`` (nm or ratio; None: no neighbour closer than a
        period), ``margin`` (positive = passes, the rule's unit) and ``relative_margin`` (margin / limit).
    """
    lr = ruleset.layers[0]
    on = (flat.layer == lr.layer) & (flat.datatype == lr.datatype)
    idx = np.flatnonzero(on)
    if idx.size == 0:
        return {"window_polygons": 0, "rules": {}}
    first = flat.xy_db[flat.start[:-1][idx]].astype(np.float64)
    mid = np.median(first, axis=0)
    keep = idx[np.argsort(np.hypot(first[:, 0] - mid[0], first[:, 1] - mid[1]), kind="stable")[:polygons]]
    sel = np.zeros(flat.count, dtype=bool)
    sel[keep] = True
    probe = replace(lr, min_width_nm=1e7 if lr.min_width_nm else None,
                    min_spacing_nm=period_nm if lr.min_spacing_nm else None, forbid_overlap=False, grid_nm=None,
                    check_validity=False, max_aspect_ratio=1e-9 if lr.max_aspect_ratio else None,
                    no_field_straddle=False, inside_frame=None, max_vertices=None, min_area_nm2=None,
                    min_notch_nm=None, min_hole_area_nm2=None, min_angle_deg=None)
    report = check_mask(flat.select(sel), replace(ruleset, layers=(probe,), write_field_um=None))
    by = {r.rule: r for r in report.results}
    out = {}
    for rule, limit, pick, sign in (("width", lr.min_width_nm, np.min, 1), ("spacing", lr.min_spacing_nm, np.min, 1),
                                    ("aspect_ratio", lr.max_aspect_ratio, np.max, -1)):
        if not limit or rule not in by:
            continue
        v = by[rule].violations.value
        measured = float(pick(v)) if v.size else None
        margin = sign * (measured - limit) if measured is not None else period_nm - limit
        out[rule] = {"limit": float(limit), "measured": measured, "margin": float(margin),
                     "relative_margin": float(margin / limit), "unit": by[rule].unit}
    return {"window_polygons": int(keep.size), "rules": out}


def _aperture_outlines(aperture) -> list:
    t = np.linspace(0, 2 * np.pi, 257)[:-1]
    if aperture.shape in ("circle", "annulus"):
        r = aperture.diameter_um / 2
        out = [np.column_stack([r * np.cos(t), r * np.sin(t)])]
        if aperture.shape == "annulus":
            ri = aperture.inner_diameter_um / 2
            out.append(np.column_stack([ri * np.cos(t), ri * np.sin(t)]))
        return out
    w = aperture.width_um / 2
    h = (aperture.height_um or aperture.width_um) / 2
    return [np.array([[-w, -h], [w, -h], [w, h], [-w, h]])]


def _field_lines(design, bbox) -> tuple:
    wf = design.mask.write_field
    if wf is None or bbox is None:
        return (), ()
    (x0, y0), (x1, y1) = bbox
    (w, h), (ox, oy) = wf.size_um, wf.origin_um
    xs = ox + w * np.arange(np.floor((x0 - ox) / w), np.ceil((x1 - ox) / w) + 1)
    ys = oy + h * np.arange(np.floor((y0 - oy) / h), np.ceil((y1 - oy) / h) + 1)
    if xs.size > 200 or ys.size > 200:  # too many to draw: the figure says so in its caption
        return (), ()
    return tuple(float(x) for x in xs), tuple(float(y) for y in ys)


def _overview(written: WrittenMask, flat, pairs: dict, manifest: dict) -> bytes:
    from metalay.checks import plots

    to_um = flat.db_unit_nm / 1000.0
    colours = {"frame": "#1f3b4d", "label": "#6b4c9a", "marks": "#2e8b57"}
    layers, boxes = {}, []
    for purpose, colour in colours.items():
        on = np.flatnonzero((flat.layer == pairs[purpose][0]) & (flat.datatype == pairs[purpose][1]))
        polys = [flat.xy_db[flat.start[k]:flat.start[k + 1]] * to_um for k in on[:20000]]
        layers[purpose] = (polys, colour)
        boxes += [(p.min(axis=0), p.max(axis=0)) for p in polys]
    apert = _aperture_outlines(written.design.aperture)
    boxes += [(a.min(axis=0), a.max(axis=0)) for a in apert]
    bbox = (np.min([b[0] for b in boxes], axis=0), np.max([b[1] for b in boxes], axis=0))
    markers = []
    for r in manifest.get("checks", {}).get("rules", {}).get("results", []):
        markers += [(v["x_um"], v["y_um"], r["rule"]) for v in r.get("listed", [])]
    return plots.mask_overview(layers, aperture_xy_um=apert, field_lines_um=_field_lines(written.design, bbox),
                               markers=markers, structures_label=f"structures ({manifest['counts']['sites']:,} "
                                                                 "elements, aperture)")


#: Bytes per lattice site an OASIS reader's one-pass read counts for the point lists and repetitions it locates
#: (16 B per integer, ``metalay.io.oasis_read``; about one repetition offset per site), for :func:`_read_layers`.
_OASIS_ONE_PASS_BYTES_PER_SITE = 16


def _read_layers(path, layers, db_unit_nm: float, sites: float = 0.0):
    """:func:`~metalay.io.gdsread.read_mask`'s polygons on a few ``layers``. GDSII is read as a stream: the file's
    pages are released as they are walked (a whole read of a 6.4 GB flat GDSII kept them resident: 7.3 GB peak at
    1e8 sites). OASIS is read in one pass when what that pass counts for ``sites`` sites fits a quarter of the
    budget (the streamed read parses the file twice: 3.8 s against 2.0 s for the frame, label and marks of a 1e7-site
    mask), else streamed. Without any polygon on those layers: an empty set on the compile's database unit."""
    from metalay.io.gdsread import FlatPolygons, read_mask
    from metalay.io.stream_read import iter_mask_chunks

    if mask_format(path) == "OASIS" and sites * _OASIS_ONE_PASS_BYTES_PER_SITE <= memory_budget(None) / 4:
        parts = [read_mask(path, layers=layers)]
        parts = parts if parts[0].count else []
    else:
        parts = list(iter_mask_chunks(path, layers=layers))
    if not parts:
        return FlatPolygons.from_arrays(np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.int64),
                                        np.zeros((0, 2), np.int64), db_unit_nm=db_unit_nm)
    return FlatPolygons.from_arrays(np.concatenate([p.layer for p in parts]),
                                    np.concatenate([p.datatype for p in parts]),
                                    np.concatenate([p.vertex_counts for p in parts]),
                                    np.concatenate([p.xy_db for p in parts]),
                                    db_unit_nm=parts[0].db_unit_nm, user_unit_m=parts[0].user_unit_m)


def compile_report_step(written: WrittenMask, manifest: dict, sections: dict) -> str:
    """The compile's ``report.html``: headline verdicts, design-rule result with margins and a map of violations,
    whole-mask overview, the checks' own sections, the manifest's numbers grouped with units, the caution.

    Reads the written mask once more: the frame, label and marks layers (and, up to
    :data:`REPORT_MARGIN_SITES` sites, the structures for the rule margins on a window).
    """
    from metalay.checks.report import compile_report

    design = written.design
    pairs = _purpose_pairs(written, manifest)
    measure = (manifest["counts"]["sites"] <= REPORT_MARGIN_SITES and design.mask.tone == "structures"
               and "rules" in manifest.get("checks", {}))
    wanted = [pairs[p] for p in ("frame", "label", "marks")] + ([pairs["structures"]] if measure else [])
    flat = _read_layers(written.path, wanted, design.mask.db_unit_nm, float(manifest["counts"]["sites"]))
    margins = None
    if measure:
        ruleset = _library_ruleset(written)()
        ruleset = replace(ruleset, layers=tuple(lr for lr in ruleset.layers
                                                if (lr.layer, lr.datatype) == pairs["structures"])[:1])
        if ruleset.layers:
            margins = rule_margins_window(flat, ruleset, period_nm=design.lattice.period_nm)
    overview = _overview(written, flat, pairs, manifest)
    extra = [s for key in sorted(sections) for s in sections[key]]
    return compile_report(manifest, extra, overview_png=overview, margins=margins)
