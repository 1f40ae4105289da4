"""The band-by-band design-rule check with a halo (metalay.checks.rules_stream) and the chunked mask read.

Equivalence checks: the whole-mask check (metalay.checks.rules.check_mask, itself tested against shapely/GEOS and
analytic geometry in test_rules.py) is the reference; the tiled check must give the identical report on masks
that fit, whatever the number of bands, with violations straddling band borders.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from metalay.checks.rules import LayerRules, RuleSet, check_mask
from metalay.checks.rules_stream import check_mask_tiled
from metalay.io.gdsread import FlatPolygons, read_mask
from metalay.io.stream_read import iter_mask_chunks
from test_gdsread import boundary, hier_file, lib_bytes  # noqa: F401  (fixture)
from test_rules import axis_rect, fin, lattice_mask, rules


def assert_same_report(tiled, whole, *, same_method=True):
    """Equivalence check: every rule, count, checked count, violation and location identical."""
    assert tiled.polygons == whole.polygons and tiled.db_unit_nm == whole.db_unit_nm
    assert [(r.layer, r.datatype, r.rule) for r in tiled.results] == [(r.layer, r.datatype, r.rule)
                                                                       for r in whole.results]
    for t, w in zip(tiled.results, whole.results):
        assert (t.count, t.checked, t.limit, t.unit, t.kind, t.source) == (w.count, w.checked, w.limit, w.unit,
                                                                          w.kind, w.source), t.rule
        if same_method:  # the same search (a band's stencil may need fewer neighbour offsets)
            assert {m.split(" (")[0] for m in t.method.split(" / ")} == {w.method.split(" (")[0]}
        for f in ("polygon", "other", "value", "x_um", "y_um", "segment_um"):
            assert np.array_equal(getattr(t.violations, f), getattr(w.violations, f)), (t.rule, f)
    dt, dw = tiled.to_dict(10 ** 6), whole.to_dict(10 ** 6)
    for d in (dt, dw):
        d.pop("mask")
        for r in d["results"]:
            r.pop("method")
    assert dt == dw


def owner_band(plan, ymin):
    return np.clip((ymin - plan.y0_db) // plan.band_db, 0, plan.bands - 1)


def straddling_pairs(report, flat, plan, rule="spacing"):
    """Pairs of the report whose two polygons are owned by different bands."""
    (r,) = [x for x in report.results if x.rule == rule]
    ymin = np.array([flat.xy_db[flat.start[k]:flat.start[k + 1], 1].min() for k in range(flat.count)])
    v = r.violations
    return int(np.count_nonzero(owner_band(plan, ymin[v.polygon]) != owner_band(plan, ymin[v.other])))


LATTICE_RULES = dict(min_width_nm=84.5, min_spacing_nm=70, forbid_overlap=True, grid_nm=1, min_angle_deg=80,
                     min_area_nm2=21300, no_field_straddle=True, write_field_um=3, max_vertices=4)


@pytest.mark.parametrize("bands", [1, 2, 7, 23])
def test_square_lattice_file_equals_whole_mask_check(tmp_path, bands):
    # Equivalence check against check_mask on a file with spacing and overlap defects (test_rules.lattice_mask)
    p = lattice_mask(tmp_path)
    rs = rules(**LATTICE_RULES)
    whole = check_mask(p, rs)
    tiled, plan = check_mask_tiled(p, rs, bands=bands, chunk_polygons=97)
    assert plan.bands == bands and plan.loaded >= plan.polygons == whole.polygons
    assert whole.total_violations > 5
    assert_same_report(tiled, whole)
    assert tiled.sha256 == whole.sha256
    if bands >= 7:  # the defects cross band borders and are still counted exactly once
        assert straddling_pairs(whole, read_mask(p), plan) >= 1


def hexagonal_fins(n=30, pitch=300, seed=5, L=250):
    """Fins on a hexagonal lattice (rows along x, odd rows shifted by half a period), random rotations."""
    rng = np.random.default_rng(seed)
    out = []
    for j in range(-n // 2, n // 2):
        for i in range(-n // 2, n // 2):
            x = (i + 0.5 * (j % 2)) * pitch
            y = j * pitch * math.sqrt(3) / 2
            if math.hypot(x, y) < n * pitch / 2.2:
                out.append(fin(int(round(x)), int(round(y)), rng.uniform(0, math.pi), L=L))
    return out


@pytest.mark.parametrize("bands", [3, 11])
def test_hexagonal_lattice_equals_whole_mask_check(bands):
    # Equivalence check on a hexagonal lattice of rotated fins tight enough to violate spacing across rows
    fins = hexagonal_fins()
    fp = FlatPolygons.from_arrays(1, 0, [4] * len(fins), np.concatenate(fins))
    rs = rules(min_width_nm=84.5, min_spacing_nm=60, forbid_overlap=True, min_angle_deg=89.5)
    whole = check_mask(fp, rs)
    tiled, plan = check_mask_tiled(fp, rs, bands=bands, chunk_polygons=50)
    sp = [r for r in whole.results if r.rule == "spacing"][0]
    assert sp.count > 10
    assert_same_report(tiled, whole)
    assert straddling_pairs(whole, fp, plan) >= 1


def test_nonconvex_shapes_frame_and_mixed_paths_equal_whole_mask_check():
    # L shapes, U slots, keyholes, a bow tie, fins outside a four-bar frame, random positions (STRtree path)
    rng = np.random.default_rng(7)
    L = np.array([(0, 0), (100, 0), (100, 40), (40, 40), (40, 100), (0, 100)])
    U = np.array([(0, 0), (130, 0), (130, 200), (80, 200), (80, 60), (50, 60), (50, 200), (0, 200)])
    key = np.array([(0, 0), (200, 0), (200, 200), (0, 200), (0, 100), (80, 100), (80, 120), (120, 120),
                    (120, 80), (80, 80), (80, 100), (0, 100)])
    bow = np.array([(0, 0), (100, 100), (100, 0), (0, 100)])
    shapes = [L, U, key, bow, fin(0, 0, 0.3), axis_rect(0, 0, 250, 85)]
    polys = [shapes[k % len(shapes)] + rng.integers(-9000, 9000, 2) for k in range(400)]
    w = 500
    bars = [axis_rect(-8000 - w, 8000, 8000 + w, 8000 + w), axis_rect(-8000 - w, -8000 - w, 8000 + w, -8000),
            axis_rect(-8000 - w, -8000, -8000, 8000), axis_rect(8000, -8000, 8000 + w, 8000)]
    layer = np.array([1] * len(polys) + [2] * 4)
    fp = FlatPolygons.from_arrays(layer, 0, [len(p) for p in polys + bars], np.concatenate(polys + bars))
    rs = RuleSet("t", (LayerRules(1, 0, min_width_nm=45, min_spacing_nm=80, forbid_overlap=True, min_area_nm2=6500,
                                  min_notch_nm=35, min_hole_area_nm2=2000, check_validity=True, min_angle_deg=60,
                                  inside_frame=(2, 0)),))
    whole = check_mask(fp, rs)
    counts = {r.rule: r.count for r in whole.results}
    assert all(counts[k] > 0 for k in ("spacing", "overlap", "notch", "hole_area", "validity", "frame_enclosure"))
    for bands in (2, 9):
        tiled, plan = check_mask_tiled(fp, rs, bands=bands, chunk_polygons=33)
        assert_same_report(tiled, whole)
        assert plan.loaded >= plan.polygons + 4 * (bands - 1)  # the frame goes to every band


def in_row_order(flat):
    """The polygons of ``flat`` reordered by their lowest y (as a compile writes a lattice: row after row)."""
    ymin = np.array([flat.xy_db[flat.start[k]:flat.start[k + 1], 1].min() for k in range(flat.count)])
    order = np.argsort(ymin, kind="stable")
    polys = [flat.xy_db[flat.start[k]:flat.start[k + 1]] for k in order]
    return FlatPolygons.from_arrays(flat.layer[order], flat.datatype[order], [len(q) for q in polys],
                                    np.concatenate(polys))


def nonconvex_frame_mask():
    """Non-convex shapes and fins at random positions (no y order in the polygon list) inside a four-bar frame."""
    rng = np.random.default_rng(11)
    shapes = [np.array([(0, 0), (100, 0), (100, 40), (40, 40), (40, 100), (0, 100)]), fin(0, 0, 0.3),
              axis_rect(0, 0, 250, 85), np.array([(0, 0), (100, 100), (100, 0), (0, 100)])]
    polys = [shapes[k % len(shapes)] + rng.integers(-6000, 6000, 2) for k in range(300)]
    w = 400
    bars = [axis_rect(-6500 - w, 6500, 6500 + w, 6500 + w), axis_rect(-6500 - w, -6500 - w, 6500 + w, -6500),
            axis_rect(-6500 - w, -6500, -6500, 6500), axis_rect(6500, -6500, 6500 + w, 6500)]
    polys = polys[:150] + bars[:2] + polys[150:] + bars[2:]  # frame polygons in the middle and at the end
    layer = np.array([1] * 150 + [2] * 2 + [1] * 150 + [2] * 2)
    return FlatPolygons.from_arrays(layer, 0, [len(q) for q in polys], np.concatenate(polys))


@pytest.mark.parametrize("second_pass", ["sweep", "spill"])
def test_both_second_passes_equal_whole_mask_check(tmp_path, monkeypatch, second_pass):
    # Equivalence check of the two ways the bands are filled: swept in memory from the second read (files in y
    # order, few frame polygons) and distributed into per-band files (any order); each forced on a y-ordered
    # lattice file and on random positions with frame polygons in the middle and at the end of the list
    from metalay.checks import rules_stream

    calls = []
    real = rules_stream._distribute
    monkeypatch.setattr(rules_stream, "_distribute", lambda *a: calls.append(1) or real(*a))
    monkeypatch.setattr(rules_stream, "_SWEEP_HOLD_LIMIT", 1e9)
    monkeypatch.setattr(rules_stream, "_SWEEP", second_pass == "sweep")
    frame_rules = RuleSet("t", (LayerRules(1, 0, min_width_nm=45, min_spacing_nm=80, forbid_overlap=True,
                                           min_area_nm2=6500, check_validity=True, inside_frame=(2, 0)),))
    rows = in_row_order(read_mask(lattice_mask(tmp_path)))
    cases = [(rows, rules(**LATTICE_RULES), 97), (lattice_mask(tmp_path), rules(**LATTICE_RULES), 97),
             (nonconvex_frame_mask(), frame_rules, 40)]
    for mask, rs, chunk in cases:
        whole = check_mask(mask, rs)
        assert whole.total_violations > 5
        for bands in (1, 4, 9):
            tiled, plan = check_mask_tiled(mask, rs, bands=bands, chunk_polygons=chunk)
            assert_same_report(tiled, whole)
            assert plan.loaded >= plan.polygons
    assert (len(calls) == 0) if second_pass == "sweep" else (len(calls) == 9)


def test_the_sweep_is_taken_for_a_file_in_y_order(tmp_path, monkeypatch):
    # the default choice: a lattice written row by row is swept in memory; column by column (each chunk spans
    # every band) or at random positions it goes through band files
    from metalay.checks import rules_stream

    calls = []
    real = rules_stream._distribute
    monkeypatch.setattr(rules_stream, "_distribute", lambda *a: calls.append(1) or real(*a))
    flat = read_mask(lattice_mask(tmp_path))
    check_mask_tiled(in_row_order(flat), rules(**LATTICE_RULES), bands=7, chunk_polygons=97)
    assert calls == []
    check_mask_tiled(flat, rules(**LATTICE_RULES), bands=7, chunk_polygons=97)
    assert calls == [1]
    calls.clear()
    check_mask_tiled(nonconvex_frame_mask(), rules(min_spacing_nm=80), bands=7, chunk_polygons=40)
    assert calls == [1]


def test_memory_budget_sets_the_band_count(tmp_path, monkeypatch):
    from metalay.checks import rules_stream

    p = lattice_mask(tmp_path)
    rs = rules(min_spacing_nm=70, forbid_overlap=True)
    whole = check_mask(p, rs)
    n = whole.polygons
    # Common practice (no source): a band is sized so 1.5 x its polygons x 300 B fit half the budget, less the
    # streamed reader's table and pages (30 B per polygon) when the bands are swept during the second read
    budget = int(n * 300 * 1.5 / 0.5 / 4) + 1
    tiled, plan = check_mask_tiled(p, rs, max_memory_bytes=budget)  # one chunk: swept
    assert plan.bands == math.ceil(1.5 * n * 300 / (budget / 2 - 30 * n)) == 6 and plan.largest_band < n
    assert_same_report(tiled, whole)
    monkeypatch.setattr(rules_stream, "_SWEEP", False)  # through band files
    tiled, plan = check_mask_tiled(p, rs, max_memory_bytes=budget)
    assert plan.bands == 4 and plan.largest_band < n
    assert_same_report(tiled, whole)
    monkeypatch.undo()
    # no room beside the reader's table (under a quarter of the band share left): band files, bands as above
    calls = []
    real = rules_stream._distribute
    monkeypatch.setattr(rules_stream, "_distribute", lambda *a: calls.append(1) or real(*a))
    tiled, plan = check_mask_tiled(p, rs, max_memory_bytes=60 * n)
    assert plan.bands == math.ceil(1.5 * n * 300 / (60 * n / 2)) and calls == [1]
    assert_same_report(tiled, whole)
    big, plan1 = check_mask_tiled(p, rs, max_memory_bytes=10 ** 10)
    assert plan1.bands == 1


def test_chunks_concatenate_to_read_mask(tmp_path, hier_file):  # noqa: F811
    # flat runs (lattice file) and a hierarchy with SREF/AREF/rotation/reflection: chunks joined == read_mask
    for path, layers in ((lattice_mask(tmp_path), [(1, 0)]), (hier_file, None)):
        whole = read_mask(path, layers=layers)
        for chunk in (1, 5, 1 << 18):
            parts = list(iter_mask_chunks(path, layers=layers, chunk_polygons=chunk))
            assert all(p.count <= max(chunk, 1) or chunk == 1 for p in parts)
            assert np.array_equal(np.concatenate([p.layer for p in parts]), whole.layer)
            assert np.array_equal(np.concatenate([p.datatype for p in parts]), whole.datatype)
            assert np.array_equal(np.concatenate([np.diff(p.start) for p in parts]), np.diff(whole.start))
            assert np.array_equal(np.concatenate([p.xy_db for p in parts]), whole.xy_db)
            assert {p.db_unit_nm for p in parts} == {whole.db_unit_nm}


def test_chunked_read_keeps_the_limits(tmp_path):
    from metalay.errors import MaskReadError

    p = tmp_path / "m.gds"
    p.write_bytes(lib_bytes([("TOP", [boundary(1, 0, axis_rect(0, 0, 10, 10).tolist()) for _ in range(20)])]))
    with pytest.raises(MaskReadError, match="max_elements=10"):
        list(iter_mask_chunks(p, max_elements=10))
    with pytest.raises(MaskReadError, match="chunk_polygons"):
        list(iter_mask_chunks(p, chunk_polygons=0))


def test_compile_steps_stream_when_the_whole_check_does_not_fit(tmp_path):
    # The compile's checks pick the whole-mask method when it fits --max-memory and stream otherwise, record which,
    # and (rules) give the same violations either way: equivalence check through the compile's own steps.
    import json
    from dataclasses import replace

    from metalay.api import compile_design
    from metalay.checks.steps import run_optics_on_written, run_rules_on_written
    from metalay.design.spec import load_design
    from metalay.mask.steps import WrittenMask

    from conftest import SMALL_DESIGN, write_toml

    data = dict(SMALL_DESIGN, mask={"formats": ["gds"]})
    design = load_design(write_toml(tmp_path / "d.toml", data))
    res = compile_design(design, tmp_path / "out", show_progress=False)
    gds = res.files["gds"]
    from metalay.cells.library import load_library

    lib = load_library(design.library)
    roomy = WrittenMask(gds, lib, design)
    tight = replace(roomy, max_memory_bytes=200_000)  # ~650 B per site of this 2,900-site mask: must stream
    whole, tiled = run_rules_on_written(roomy), run_rules_on_written(tight)
    assert whole["method"] == {"method": "whole-mask"}
    assert tiled["method"]["method"] == "tiled" and tiled["method"]["bands"] > 1
    assert tiled["violations"] == whole["violations"] and tiled["status"] == whole["status"]
    for a, b in zip(tiled["results"], whole["results"]):
        assert (a["rule"], a["count"], a["checked"], a["listed"]) == (b["rule"], b["count"], b["checked"], b["listed"])
    o = run_optics_on_written(tight)
    assert o["method"]["method"] == "streamed block far field"
    assert o["verdict"] in ("pass", "warn", "fail")
    # the vortex's OAM purity is judged when streaming too (ring x sector sums; docs/scale-checks.md): a value
    # against its thresholds, not an unmeasured item
    oam = [i for i in o["verdict_items"] if i["key"] == "oam_purity"]
    assert len(oam) == 1 and oam[0]["value"] is not None and 0 < oam[0]["value"] <= 1
    saved = json.loads((gds.parent / "optics" / "optics.json").read_text())
    assert saved["method"] == "streamed block far field" and "design aid" in saved["caution"]
    assert "error_bound" in saved and saved["block"]["block_um"] > 0


def test_cli_bands_give_the_same_report_and_markers(tmp_path, capsys):
    # Equivalence check through the command line: --bands 6 against the whole-mask run (JSON and marker GDSII)
    import json

    from metalay.cli import main

    p = lattice_mask(tmp_path)
    rules_file = tmp_path / "r.toml"
    rules_file.write_text('format = "metalay.rules"\nformat_version = 1\nname = "t"\n[[layers]]\nlayer = 1\n'
                          'datatype = 0\nname = "fins"\nmin_spacing_nm = 70\nforbid_overlap = true\n'
                          'min_width_nm = 84.5\n[layers.sources]\nmin_spacing_nm = "Common practice (no source)"\n'
                          'min_width_nm = "Common practice (no source)"\n')
    outs = {}
    for name, extra in (("whole", []), ("bands", ["--bands", "6"])):
        code = main(["rules", "check", str(p), "--rules", str(rules_file), "-o", str(tmp_path / name), *extra])
        assert code == 1  # violations
        outs[name] = (json.loads((tmp_path / name / "lattice.rules.json").read_text()),
                      (tmp_path / name / "lattice.markers.gds").read_bytes())
    text = capsys.readouterr().out
    assert "checked in 6 bands" in text
    (jw, mw), (jb, mb) = outs["whole"], outs["bands"]
    assert jw.pop("method") == {"method": "whole-mask"} and jb.pop("method")["bands"] == 6
    for d in (jw, jb):
        for r in d["results"]:
            r.pop("method")
    assert jw == jb
    assert mw == mb  # the same markers and involved polygons, byte for byte
    assert main(["rules", "check", str(p), "--rules", str(rules_file), "--bands", "-1"]) == 2


def test_cli_bands_on_missing_or_garbage_file_is_one_line(tmp_path, capsys):
    from metalay.cli import main

    bad = tmp_path / "bad.gds"
    bad.write_bytes(b"garbage")
    for path in (bad, tmp_path / "missing.gds"):
        for extra in ([], ["--bands", "3"]):
            assert main(["rules", "check", str(path), "--rules", "tio2-ebl-example", *extra]) == 3
            err = capsys.readouterr().err.strip()
            assert "\n" not in err and str(path) in err
