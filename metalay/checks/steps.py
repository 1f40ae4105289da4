"""The checks a compile runs on the mask it wrote, as :class:`~metalay.mask.steps.MaskCheck` steps.

:func:`default_checks` assembles the standard set (design rules, then the quick optical check); the compile
receives it as an argument (:func:`metalay.mask.compile.compile_mask`), so the checks depend on the mask stages and
never the other way round. :func:`metalay.api.compile_design` and the command line pass this set.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from metalay.checks.rules import check_mask, rules_from_library
from metalay.checks.rules_stream import check_mask_tiled
from metalay.design.limits import judge
from metalay.design.spec import Design
from metalay.mask.process import WriteFieldGrid
from metalay.mask.steps import MaskCheck, WrittenMask
from metalay.util.budget import memory_budget

__all__ = ["default_checks", "rules_step", "optics_step", "run_rules_on_written", "run_optics_on_written"]

#: Vertex limit of the written pieces of a tone inversion (GDSII allows 8191 points, the last repeats the first).
_PIECE_MAX_VERTICES = 8190
#: Peak memory per lattice site of each check run by a compile, for its memory admission (``bench/bench_admission.py``:
#: the larger of the virtual and resident slope between 1e6 and 4e6 sites, measured 288 and 214, rounded up).
RULES_BYTES_PER_SITE = 300
OPTICS_BYTES_PER_SITE = 220
#: Peak memory per site of the streamed checks beyond one band or block grid (the file walk's table;
#: ``bench/bench_stream_checks.py``). Not yet the compile's admission constant: the compile still admits with the
#: whole-mask figures above, because the streamed reader maps the mask file, which counts against an address-space
#: limit (``ulimit -v``); a check streams when, at the time it runs, its whole-mask method does not fit the budget.
STREAMED_BYTES_PER_SITE = 16
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


def _rules_report(path, rules, max_memory_bytes: int | None):
    """The rule report and the method used: whole-mask when it fits the budget, else band by band."""
    if whole_mask_fits(path, rules.layer_pairs(), RULES_BYTES_PER_SITE, max_memory_bytes):
        return check_mask(path, rules, max_memory_bytes=max_memory_bytes), {"method": "whole-mask"}
    report, plan = check_mask_tiled(path, rules, max_memory_bytes=max_memory_bytes,
                                    spill_dir=Path(path).parent)
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
                     bytes_per_site=RULES_BYTES_PER_SITE)


def optics_step(*, force: bool | None = None) -> MaskCheck:
    """The quick optical check step (:func:`run_optics_on_written`); on when ``[checks] optics`` is (or ``force``)."""
    return MaskCheck("optics", run_optics_on_written, _switch("optics", force), bytes_per_site=OPTICS_BYTES_PER_SITE)


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
    if written.structures_path is None:
        report, method = _rules_report(path, ruleset(), budget)
    else:
        report, method = _rules_report(written.structures_path, ruleset(inside_frame=None), budget)
        piece_rules = ruleset(min_width_nm=None, min_spacing_nm=None, forbid_overlap=False, film_height_nm=None,
                              max_aspect_ratio=None, no_field_straddle=False, max_vertices=_PIECE_MAX_VERTICES)
        complement_dt = dict(mask.dose_datatypes).get("complement")
        pieces, _ = _rules_report(path, replace(piece_rules, layers=tuple(
            replace(lr, datatype=int(lr.datatype if complement_dt is None else complement_dt))
            for lr in piece_rules.layers)), budget)
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


def run_optics_on_written(written: WrittenMask) -> dict:
    """The quick optical check of the mask just written (:func:`metalay.checks.optics.compile_check`)."""
    from metalay.checks import optics  # imported when the step runs: it pulls in the FFT and plotting stack

    if getattr(written.design, "spin_decoupled", False):  # a phase per input spin: both spins are checked
        from metalay.checks.spinoptics import compile_spin_check

        return compile_spin_check(written.path, written.library, written.design)
    layer = written.design.mask.layer("structures")
    if whole_mask_fits(written.path, [layer], OPTICS_BYTES_PER_SITE, written.max_memory_bytes):
        d = optics.compile_check(written.path, written.library, written.design)
        d["method"] = {"method": "whole-mask"}
        return d
    from metalay.checks.optics_stream import compile_check_streamed

    return compile_check_streamed(written.path, written.library, written.design)
