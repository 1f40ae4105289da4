"""Design-rule checks: analytic geometries, rotated neighbours against shapely, lattice path == STRtree path,
write-field straddling, frame enclosure, rules files with sources, and the command line."""

from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from metalay.checks.rules import (
    LayerRules,
    RuleSet,
    check_mask,
    load_rules,
    parse_rules,
    polygon_distance_kernel,
    rules_from_library,
)
from metalay.errors import MaskReadError, RulesError
from metalay.io.gdsread import FlatPolygons, read_mask
from test_gdsread import boundary, lib_bytes  # the independent minimal GDSII writer

ROOT = Path(__file__).resolve().parent.parent


def flat(polys, layer=1, datatype=0) -> FlatPolygons:
    counts = [len(p) for p in polys]
    return FlatPolygons.from_arrays(layer, datatype, counts, np.concatenate([np.asarray(p) for p in polys]))


def result(report, rule):
    (r,) = [x for x in report.results if x.rule == rule]
    return r


def rules(**kw) -> RuleSet:
    wf = kw.pop("write_field_um", None)
    return RuleSet("t", (LayerRules(1, 0, **kw),), write_field_um=wf)


def pyth_rect(a, b, ux=3, uy=4, h=5, x0=0, y0=0):
    """Rectangle of sides a*h (along (ux, uy)/h) and b*h (along (-uy, ux)/h) with integer vertices.

    Pythagorean direction (3, 4, 5): rotation atan2(4, 3) = 53.130 deg; sides exactly a*5 and b*5.
    """
    u = np.array([ux, uy]) * a
    v = np.array([-uy, ux]) * b
    o = np.array([x0, y0])
    return np.array([o, o + u, o + u + v, o + v])


def axis_rect(x0, y0, x1, y1):
    return np.array([(x0, y0), (x1, y0), (x1, y1), (x0, y1)])


# ------------------------------------------------------------------------------------------------------------------
# Analytic geometries
# ------------------------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("direction", [(1, 0, 1), (3, 4, 5), (5, 12, 13), (-4, 3, 5), (8, 15, 17)])
def test_width_and_area_of_rotated_rectangles(direction):
    # Source: plane geometry; a rectangle spanned by orthogonal vectors of lengths L and W has width W, area L*W.
    ux, uy, h = direction
    a, b = 50, 17  # side multipliers
    r = pyth_rect(a, b, ux, uy, h)
    L, W = a * h, b * h
    rep = check_mask(flat([r]), rules(min_width_nm=W + 0.5, min_area_nm2=L * W + 1, min_angle_deg=89.9))
    w = result(rep, "width")
    assert w.count == 1 and w.worst_value == pytest.approx(W, rel=1e-12)
    assert result(rep, "area").worst_value == L * W
    assert result(rep, "angle").count == 0  # all angles exactly 90 deg
    clean = check_mask(flat([r]), rules(min_width_nm=W - 0.5, min_area_nm2=L * W))
    assert clean.clean


def test_spacing_touching_overlapping_pairs():
    # Source: plane geometry; two axis-aligned rectangles with a gap g along x are g apart.
    a = axis_rect(0, 0, 250, 85)
    polys = [a, axis_rect(310, 0, 560, 85),              # 60 nm gap
             axis_rect(0, 1000, 250, 1085), axis_rect(250, 1000, 500, 1085),   # touching
             axis_rect(0, 2000, 250, 2085), axis_rect(200, 2050, 450, 2135),   # overlapping
             axis_rect(0, 3000, 250, 3085), axis_rect(350, 3000, 600, 3085)]   # 100 nm gap
    rep = check_mask(flat(polys), rules(min_spacing_nm=70, forbid_overlap=True), method="tree")
    sp = result(rep, "spacing")
    assert sp.count == 1 and (sp.violations.polygon[0], sp.violations.other[0]) == (0, 1)
    assert sp.worst_value == 60.0 and sp.worst_xy_um == pytest.approx((0.280, sp.worst_xy_um[1]))
    ov = result(rep, "overlap")
    assert ov.count == 2 and sorted(zip(ov.violations.polygon, ov.violations.other)) == [(2, 3), (4, 5)]


def test_rotated_pair_spacing_exact():
    # (3,4,5) rotated fin and an axis-aligned fin: distance from shapely, computed independently.
    a = pyth_rect(50, 17)
    b = axis_rect(300, -50, 550, 35)
    want = shapely.Polygon(a).distance(shapely.Polygon(b))
    rep = check_mask(flat([a, b]), rules(min_spacing_nm=want + 1))
    assert result(rep, "spacing").worst_value == pytest.approx(want, rel=1e-12)


def test_l_shape_and_slot():
    # L shape, arms 40 nm wide: width 40, area 100*40 + 60*40, one reflex corner (270 deg), angles >= 90.
    L = np.array([(0, 0), (100, 0), (100, 40), (40, 40), (40, 100), (0, 100)])
    rep = check_mask(flat([L]), rules(min_width_nm=45, min_area_nm2=6500, min_angle_deg=89, min_notch_nm=30,
                                      check_validity=True))
    assert result(rep, "width").worst_value == 40.0
    assert result(rep, "area").worst_value == 100 * 40 + 60 * 40
    assert result(rep, "angle").count == 0 and result(rep, "notch").count == 0 and result(rep, "validity").count == 0
    # U shape with a 30 nm slot between two 50 nm prongs: notch 30, width 50
    U = np.array([(0, 0), (130, 0), (130, 200), (80, 200), (80, 60), (50, 60), (50, 200), (0, 200)])
    rep = check_mask(flat([U]), rules(min_width_nm=55, min_notch_nm=35))
    assert result(rep, "notch").worst_value == 30.0 and result(rep, "notch").count == 1
    assert result(rep, "width").worst_value == 50.0
    assert check_mask(flat([U]), rules(min_width_nm=50, min_notch_nm=30)).clean


def test_keyhole_hole_and_self_intersection():
    # 200 x 200 square with a 40 x 40 hole joined by a zero-width cut (keyhole): valid, hole area 1600.
    key = np.array([(0, 0), (200, 0), (200, 200), (0, 200), (0, 100), (80, 100), (80, 120), (120, 120), (120, 80),
                    (80, 80), (80, 100), (0, 100)])
    rep = check_mask(flat([key]), rules(check_validity=True, min_hole_area_nm2=2000, min_notch_nm=50))
    assert result(rep, "validity").count == 0
    assert result(rep, "hole_area").worst_value == pytest.approx(1600.0)
    assert result(rep, "notch").worst_value == pytest.approx(40.0)
    # bow tie: self-intersection at (50, 50)
    bow = np.array([(0, 0), (100, 100), (100, 0), (0, 100)])
    v = result(check_mask(flat([bow]), rules(check_validity=True)), "validity")
    assert v.count == 1 and v.worst_xy_um == pytest.approx((0.05, 0.05))


def test_acute_angle_and_grid():
    # right triangle with legs 300 (x) and 400 (y): angles atan(4/3)=53.13, atan(3/4)=36.87, 90 deg
    tri = np.array([(0, 0), (300, 0), (0, 400)])
    a = result(check_mask(flat([tri]), rules(min_angle_deg=40)), "angle")
    assert a.count == 1 and a.worst_value == pytest.approx(math.degrees(math.atan2(3, 4)), rel=1e-12)
    assert a.worst_xy_um == pytest.approx((0.0, 0.4))
    assert check_mask(flat([tri]), rules(min_angle_deg=36.8)).clean
    # grid of 2 nm: one vertex at x = 301 is 1 nm off
    tri2 = np.array([(0, 0), (301, 0), (0, 400)])
    g = result(check_mask(flat([tri, tri2]), rules(grid_nm=2)), "grid")
    assert g.count == 1 and g.violations.polygon[0] == 1 and g.worst_value == 1.0
    assert g.worst_xy_um == pytest.approx((0.301, 0.0))


def test_aspect_ratio_against_film_height():
    fin = axis_rect(0, 0, 250, 85)
    thin = axis_rect(1000, 0, 1250, 50)
    r = result(check_mask(flat([fin, thin]), rules(film_height_nm=600, max_aspect_ratio=10)), "aspect_ratio")
    assert r.count == 1 and r.worst_value == pytest.approx(12.0) and r.violations.polygon[0] == 1


def test_write_field_straddle_known_placement():
    # 10 um fields centred on the origin: boundaries at x, y = +-5000 nm, +-15000 nm ...
    polys = [axis_rect(4900, 0, 5100, 85),    # straddles x = 5000 by 100 nm on each side
             axis_rect(4800, 0, 5000, 85),    # ends exactly on the boundary: not straddling
             axis_rect(-200, -5030, 50, -4990),  # straddles y = -5000 (10 nm above, 30 below)
             axis_rect(0, 0, 250, 85)]
    r = result(check_mask(flat(polys), rules(no_field_straddle=True, write_field_um=10)), "field_straddle")
    assert sorted(r.violations.polygon.tolist()) == [0, 2]
    assert dict(zip(r.violations.polygon.tolist(), r.violations.value.tolist())) == {0: 100.0, 2: 10.0}


def test_frame_enclosure_with_bar_frame():
    # frame of four bars (like compile writes) around [-10000, 10000]^2
    w = 500
    bars = [axis_rect(-10000 - w, 10000, 10000 + w, 10000 + w), axis_rect(-10000 - w, -10000 - w, 10000 + w, -10000),
            axis_rect(-10000 - w, -10000, -10000, 10000), axis_rect(10000, -10000, 10000 + w, 10000)]
    fins = [axis_rect(0, 0, 250, 85), axis_rect(9900, 0, 10150, 85), axis_rect(20000, 0, 20250, 85)]
    fp = FlatPolygons.from_arrays(np.array([1, 1, 1, 2, 2, 2, 2]), 0, [4] * 7,
                                  np.concatenate(fins + bars))
    r = result(check_mask(fp, RuleSet("t", (LayerRules(1, 0, inside_frame=(2, 0)),))), "frame_enclosure")
    assert sorted(r.violations.polygon.tolist()) == [1, 2]


# ------------------------------------------------------------------------------------------------------------------
# Rotated neighbours against shapely, and the distance kernel
# ------------------------------------------------------------------------------------------------------------------

def fin(cx, cy, angle, L=250, W=85):
    c, s = math.cos(angle), math.sin(angle)
    base = np.array([(-L / 2, -W / 2), (L / 2, -W / 2), (L / 2, W / 2), (-L / 2, W / 2)])
    off = np.rint(np.stack([c * base[:, 0] - s * base[:, 1], s * base[:, 0] + c * base[:, 1]], 1)).astype(np.int64)
    return off + np.array([cx, cy])


@settings(max_examples=60, deadline=None, derandomize=True)
@given(a=st.floats(0, math.pi), b=st.floats(0, math.pi), pitch=st.integers(200, 420), diag=st.booleans())
def test_rotated_neighbour_spacing_equals_shapely(a, b, pitch, diag):
    # Source: the exact polygon distance from GEOS through shapely, computed on the pair alone.
    A = fin(0, 0, a)
    B = fin(pitch, pitch if diag else 0, b)
    want = shapely.Polygon(A).distance(shapely.Polygon(B))
    rs = rules(min_spacing_nm=1000, forbid_overlap=True)
    for method in ("tree", "auto"):
        rep = check_mask(flat([A, B]), rs, method=method)
        sp, ov = result(rep, "spacing"), result(rep, "overlap")
        if want == 0:
            assert ov.count == 1 and sp.count == 0
        else:
            assert sp.count == 1 and ov.count == 0 and sp.worst_value == pytest.approx(want, rel=1e-12)


@settings(max_examples=100, deadline=None, derandomize=True)
@given(st.lists(st.tuples(st.integers(-300, 300), st.integers(-300, 300)), min_size=8, max_size=8),
       st.integers(-400, 400), st.integers(-400, 400))
def test_distance_kernel_matches_shapely(pts, dx, dy):
    hull_a = shapely.convex_hull(shapely.MultiPoint(pts[:4]))
    hull_b = shapely.convex_hull(shapely.MultiPoint([(x + dx, y + dy) for x, y in pts[4:]]))
    if hull_a.geom_type != "Polygon" or hull_b.geom_type != "Polygon":
        return
    ca = np.asarray(hull_a.exterior.coords)[:-1]
    cb = np.asarray(hull_b.exterior.coords)[:-1]
    if len(ca) != 4 or len(cb) != 4:
        return
    d, pa, pb = polygon_distance_kernel(ca[None].astype(np.int64), cb[None].astype(np.int64))
    assert d[0] == pytest.approx(hull_a.distance(hull_b), rel=1e-12, abs=1e-12)
    assert np.hypot(*(pa[0] - pb[0])) == pytest.approx(d[0], rel=1e-9, abs=1e-9)


# ------------------------------------------------------------------------------------------------------------------
# Lattice fast path equals the STRtree path, on a file written by the independent writer
# ------------------------------------------------------------------------------------------------------------------

def lattice_mask(tmp_path, n=40, pitch=325, seed=3):
    rng = np.random.default_rng(seed)
    ii, jj = np.meshgrid(np.arange(n) - n // 2, np.arange(n) - n // 2, indexing="ij")
    ok = np.hypot(ii, jj) < n / 2.1
    ang = rng.uniform(0, np.pi, ok.sum())
    ci, cj = ii[ok], jj[ok]
    # deliberate defects that keep the lattice: two aligned fins 75 nm apart (spacing), an over-long fin (overlap)
    k_long = min(200, ci.size // 2)
    for k0 in (5, k_long):
        k1 = int(np.flatnonzero((ci == ci[k0] + 1) & (cj == cj[k0]))[0])
        ang[k0] = ang[k1] = 0.0
    lengths = np.full(ang.size, 250)
    lengths[k_long] = 420
    fins = [fin(int(i) * pitch, int(j) * pitch, t, L=int(L)) for i, j, t, L in zip(ci, cj, ang, lengths)]
    p = tmp_path / "lattice.gds"
    p.write_bytes(lib_bytes([("TOP", [boundary(1, 0, f.tolist()) for f in fins])]))
    return p


@pytest.mark.parametrize("spacing_nm, n_offsets", [(70, 4), (260, 6)])  # the 420 nm fin reaches diagonals
def test_lattice_path_equals_tree_path(tmp_path, spacing_nm, n_offsets):
    p = lattice_mask(tmp_path)
    rs = rules(min_width_nm=84.5, min_spacing_nm=spacing_nm, forbid_overlap=True, grid_nm=1, min_angle_deg=80,
               no_field_straddle=True, write_field_um=3)
    fast = check_mask(p, rs, method="auto")
    slow = check_mask(p, rs, method="tree")
    assert result(fast, "spacing").method == f"lattice ({n_offsets} neighbour offsets)"
    assert result(slow, "spacing").method == "strtree"
    assert result(fast, "spacing").count > 5 and result(fast, "overlap").count >= 1
    for x, y in zip(fast.results, slow.results):
        vx, vy = x.violations, y.violations
        assert x.rule == y.rule and x.count == y.count
        assert np.array_equal(vx.polygon, vy.polygon) and np.array_equal(vx.other, vy.other)
        assert np.array_equal(vx.value, vy.value)  # bit for bit: same operation order as GEOS on integers
        if x.rule == "spacing":  # closest points may differ between ties, but each segment has the reported length
            for seg, val in ((vx.segment_um, vx.value), (vy.segment_um, vy.value)):
                ln = np.hypot(seg[:, 2] - seg[:, 0], seg[:, 3] - seg[:, 1]) * 1000
                assert np.allclose(ln, val, rtol=1e-9, atol=1e-6)


def test_small_chunks_and_threads_give_the_same_report(tmp_path, monkeypatch):
    # many small chunks (chunk boundaries inside rows of the lattice), on 1 and on 2 threads, and the tree path
    import metalay.checks.rules as rules_mod

    p = lattice_mask(tmp_path)
    rs = rules(min_width_nm=84.5, min_spacing_nm=70, forbid_overlap=True, min_angle_deg=80, min_area_nm2=21300)
    monkeypatch.setattr(rules_mod, "_GEOM_CHUNK", 37)
    monkeypatch.setattr(rules_mod, "_PAIR_CHUNK", 64)
    reports = []
    for threads in ("1", "2"):
        monkeypatch.setenv("METALAY_THREADS", threads)
        reports.append(check_mask(p, rs))
    reports.append(check_mask(p, rs, method="tree"))
    assert result(reports[0], "spacing").count > 5 and result(reports[0], "width").count > 0
    for other in reports[1:]:
        for x, y in zip(reports[0].results, other.results):
            assert x.rule == y.rule and x.count == y.count
            assert np.array_equal(x.violations.polygon, y.violations.polygon)
            assert np.array_equal(x.violations.other, y.violations.other)
            assert np.array_equal(x.violations.value, y.violations.value)
    for x, y in zip(reports[0].results, reports[1].results):  # threads: identical bytes, closest points included
        assert np.array_equal(x.violations.segment_um, y.violations.segment_um)


def test_non_lattice_falls_back_to_tree(tmp_path):
    rng = np.random.default_rng(1)
    fins = [fin(int(x), int(y), t) for x, y, t in zip(rng.integers(-5000, 5000, 200), rng.integers(-5000, 5000, 200),
                                                   rng.uniform(0, np.pi, 200))]
    rep = check_mask(flat(fins), rules(min_spacing_nm=50, forbid_overlap=True))
    assert result(rep, "spacing").method == "strtree"
    polys = shapely.polygons(fins)
    d = shapely.distance(polys[:, None], polys[None, :])
    iu = np.triu_indices(200, 1)
    assert result(rep, "spacing").count == int(((d[iu] > 0) & (d[iu] < 50)).sum())
    assert result(rep, "overlap").count == int((d[iu] == 0).sum())


# ------------------------------------------------------------------------------------------------------------------
# Rules files
# ------------------------------------------------------------------------------------------------------------------

def test_bundled_rules_files_carry_sources():
    files = sorted((ROOT / "libraries" / "rules").glob("*.toml"))
    assert len(files) >= 2
    for f in files:
        rs = load_rules(f)
        data = tomllib.loads(f.read_text())
        assert data["write_field"]["source"]
        for layer in data["layers"]:
            srcs = layer["sources"]
            for k, v in layer.items():
                if k in ("layer", "datatype", "name", "sources") or isinstance(v, bool) or isinstance(v, list):
                    continue
                src = srcs.get(k, "")
                cited = any(tag in src for tag in ("Common practice (no source)", "From memory:", "Source:"))
                assert cited, f"{f.name}: {k} has no origin"
        assert rs.layers


def test_rules_file_errors_name_key_and_range(tmp_path):
    with pytest.raises(RulesError, match=r"layers\[0\]\.min_width_nm.*-5.*number in"):
        parse_rules({"layers": [{"layer": 1, "min_width_nm": -5}]})
    with pytest.raises(RulesError, match=r"layers\[0\]\.min_widht_nm"):
        parse_rules({"layers": [{"layer": 1, "min_widht_nm": 5}]})
    with pytest.raises(RulesError, match="film_height_nm"):
        parse_rules({"layers": [{"layer": 1, "max_aspect_ratio": 5}]})
    bad = tmp_path / "r.toml"
    bad.write_text("layers = [")
    with pytest.raises(RulesError, match="not valid TOML"):
        load_rules(bad)


def test_rules_from_library_defaults():
    rs = rules_from_library({"min_feature_nm": 60, "min_gap_nm": 40, "max_aspect_ratio": 10, "grid_nm": 1,
                             "source": "Common practice (no source)"}, film_height_nm=600)
    lr = rs.layers[0]
    assert (lr.min_width_nm, lr.min_spacing_nm, lr.max_aspect_ratio, lr.film_height_nm) == (60, 40, 10, 600)
    assert lr.forbid_overlap and lr.check_validity


# ------------------------------------------------------------------------------------------------------------------
# Command line
# ------------------------------------------------------------------------------------------------------------------

def run_cli(argv):
    from metalay.cli import main

    return main(argv)


def test_cli_exit_codes_reports_and_markers(tmp_path, capsys):
    p = lattice_mask(tmp_path)
    rfile = tmp_path / "r.toml"
    rfile.write_text('name = "t"\n[[layers]]\nlayer = 1\nmin_spacing_nm = 70.0\nforbid_overlap = true\n'
                     'min_width_nm = 80.0\n[layers.sources]\nmin_spacing_nm = "Common practice (no source)"\n')
    out = tmp_path / "out"
    assert run_cli(["rules", "check", str(p), "--rules", str(rfile), "-o", str(out)]) == 1
    text = capsys.readouterr().out
    assert "spacing" in text and "violations" in text
    rep = json.loads((out / "lattice.rules.json").read_text())
    sp = [r for r in rep["results"] if r["rule"] == "spacing"][0]
    assert sp["count"] > 5 and sp["listed"][0]["value"] == sp["worst_value"]
    first = (out / "lattice.rules.json").read_bytes()
    marker = read_mask(out / "lattice.markers.gds")
    assert (marker.layer == 1000).sum() == sum(r["count"] for r in rep["results"])
    assert set(np.unique(marker.layer)) == {1, 1000}
    # deterministic: the same check writes the same bytes
    assert run_cli(["rules", "check", str(p), "--rules", str(rfile), "-o", str(out), "--quiet"]) == 1
    assert (out / "lattice.rules.json").read_bytes() == first
    # clean -> 0
    clean = tmp_path / "clean.toml"
    clean.write_text('[[layers]]\nlayer = 1\nmin_width_nm = 80.0\n')
    assert run_cli(["rules", "check", str(p), "--rules", str(clean), "-o", str(out), "--no-markers"]) == 0
    # unreadable mask -> 3, bad rules -> 2, no partial output
    junk = tmp_path / "junk.gds"
    junk.write_bytes(p.read_bytes()[:1000])
    assert run_cli(["rules", "check", str(junk), "--rules", str(clean), "-o", str(tmp_path / "o2")]) == 3
    assert not (tmp_path / "o2" / "junk.rules.json").exists()
    assert run_cli(["rules", "check", str(p), "--rules", str(tmp_path / "missing.toml")]) == 2
    err = capsys.readouterr().err
    assert "truncated" in err and "missing.toml" in err
    assert MaskReadError.exit_code == 3


def test_cli_info(tmp_path, capsys):
    p = lattice_mask(tmp_path, n=10)
    assert run_cli(["info", str(p), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["format"] == "GDSII" and info["layers"][0]["layer"] == 1
    assert run_cli(["info", str(p)]) == 0
    assert "sha256" in capsys.readouterr().out


# ------------------------------------------------------------------------------------------------------------------
# Many-vertex polygons and stacked shapes: linear in vertices, bounded in pairs
# ------------------------------------------------------------------------------------------------------------------

def _convex_hull(points) -> np.ndarray:
    """Strictly convex integer polygon: the convex hull of the points rounded to integers (shapely's hull keeps
    only vertices, no collinear points, so the ring of integer points is strictly convex)."""
    pts = np.rint(np.asarray(points, np.float64))
    ring = np.asarray(shapely.convex_hull(shapely.multipoints(pts)).exterior.coords)[:-1]
    return ring.astype(np.int64)


@settings(max_examples=15)
@given(st.integers(40, 100), st.floats(1e3, 3e6), st.floats(0.05, 1.0), st.booleans(), st.integers(0, 10_000))
def test_many_vertex_features_equal_the_vertex_pair_loop(n, radius, aspect, clockwise, seed):
    # convergence check (no outside source): the O(n log n) width search of the wide path finds exactly the value
    # and the (edge, vertex) pair of the loop over all vertex pairs, and every other feature is the same
    import metalay.checks.rules as R

    rng = np.random.default_rng(seed)
    a = np.sort(rng.uniform(0, 2 * np.pi, n))
    X = _convex_hull(np.stack([radius * np.cos(a), aspect * radius * np.sin(a)], 1))
    if X.shape[0] <= R._WIDE_VERTICES:
        return
    X = np.roll(X[::-1] if clockwise else X, int(rng.integers(0, X.shape[0])), axis=0)[None]
    wide, wide_seg = R._group_features_wide(X, True), R._width_segments_wide(X)
    saved = R._WIDE_VERTICES
    try:
        R._WIDE_VERTICES = 1 << 30
        loop, loop_seg = R._group_features(X, True), R._width_segments(X)
    finally:
        R._WIDE_VERTICES = saved
    for key in ("area2", "convex", "angle", "kmin", "width", "bbox", "r2max"):
        assert np.array_equal(wide[key], loop[key]), key
    assert wide["convex"][0] and np.array_equal(wide_seg, loop_seg)


@settings(max_examples=25)
@given(st.integers(70, 200), st.integers(0, 10_000), st.sampled_from([25.0, 80.0, 300.0]))
def test_indexed_facing_pairs_equal_all_pairs_within_reach(n, seed, reach):
    # convergence check (no outside source): a non-convex polygon's width and notch below the rules' reach are the
    # same (value and segment) whether every (edge, vertex) pair is tried or only those the index finds
    import metalay.checks.rules as R

    rng = np.random.default_rng(seed)
    a = np.sort(rng.uniform(0, 2 * np.pi, n))
    r = rng.uniform(200, 1000, n)
    ring = np.rint(np.stack([r * np.cos(a), r * np.sin(a)], 1)).astype(np.int64)
    full = R._shapely_polygon_analysis(ring, True, True, None)
    near = R._shapely_polygon_analysis(ring, True, True, reach)
    for key in ("width", "notch"):
        if full[key] is not None and full[key][0] < reach - 1:
            assert near[key] is not None and near[key][0] == full[key][0], key
            assert np.array_equal(near[key][1], full[key][1]), key


def test_comb_of_8190_vertices_width_and_notch_exact():
    # a comb: 2046 teeth 50 nm wide with 30 nm gaps on a 200 nm spine (non-convex, 8188 vertices); widths and gaps
    # are known by construction: the width violation is the teeth (50 nm), the notch the gaps (30 nm)
    teeth = 2046
    xs = np.arange(teeth) * 80
    top = np.stack([np.repeat(xs, 4) + np.tile([0, 0, 50, 50], teeth), np.tile([200, 1200, 1200, 200], teeth)], 1)
    ring = np.concatenate([[[xs[-1] + 50, 0], [0, 0]], top])
    assert ring.shape[0] == 8186
    rules = RuleSet("comb", (LayerRules(1, 0, min_width_nm=60.0, min_notch_nm=40.0, max_vertices=8190),))
    rep = check_mask(flat([ring]), rules)
    width, notch = result(rep, "width"), result(rep, "notch")
    assert width.count == 1 and width.worst_value == pytest.approx(50.0, abs=1e-9)
    assert notch.count == 1 and notch.worst_value == pytest.approx(30.0, abs=1e-9)
    assert result(rep, "vertices").count == 0


def test_8190_vertex_circle_and_convex_polygon_are_measured():
    # the GDSII maximum (8191 points with the closing one); a circle of 500 um radius snapped to 1 nm is not strictly
    # convex (snapping makes some vertices collinear or reflex), its hull is; both are wide, not quadratic
    n = 8190
    t = 2 * np.pi * np.arange(n) / n
    circle = np.rint(np.stack([500_000 * np.cos(t), 500_000 * np.sin(t)], 1)).astype(np.int64)
    rules = RuleSet("big", (LayerRules(1, 0, min_width_nm=20.0, min_notch_nm=20.0, max_vertices=8000,
                                       check_validity=True, min_angle_deg=10.0),))
    rep = check_mask(flat([circle]), rules)
    assert result(rep, "vertices").count == 1 and result(rep, "width").count == 0
    assert result(rep, "validity").count == 0 and result(rep, "notch").count == 0
    # strictly convex (the hull of the snapped circle, centrally symmetric because rounding is odd-symmetric):
    # every edge faces its parallel opposite edge, whose end points project onto its own, so the local width is
    # twice the smallest distance from the centre to an edge line (computed here without the checker's code)
    hull = _convex_hull(circle)
    assert hull.shape[0] > 4000 and np.array_equal(np.sort(hull, axis=0), np.sort(-hull, axis=0))
    e = np.roll(hull, -1, axis=0) - hull
    apothem = np.abs(hull[:, 0] * e[:, 1] - hull[:, 1] * e[:, 0]) / np.hypot(e[:, 0], e[:, 1])
    got = check_mask(flat([hull]), RuleSet("h", (LayerRules(1, 0, min_width_nm=1.1e6),)))
    w = result(got, "width")
    assert w.count == 1 and w.worst_value == pytest.approx(2 * apothem.min(), rel=1e-12)


def test_stacked_and_overlapping_boxes_pairs_capped_and_paths_equal():
    from metalay.checks.rules import MAX_PAIRS, PAIRS_PER_POLYGON

    box = np.array([[0, 0], [100, 0], [100, 100], [0, 100]])
    stack = flat([box] * 65536)
    rep = check_mask(stack, RuleSet("s", (LayerRules(1, 0, forbid_overlap=True, min_spacing_nm=10.0),)))
    ov = result(rep, "overlap")
    # 65536 * 65535 / 2 = 2.1e9 overlapping pairs: the search stops at the cap and says so
    cap = max(MAX_PAIRS, PAIRS_PER_POLYGON * 65536)
    assert ov.count == cap and ov.count_is_lower_bound
    d = ov.to_dict(5)
    assert d["count_is_lower_bound"] and d["pair_cap"] == cap and d["listed_truncated"]
    assert "at least" in next(line for line in rep.summary_lines() if "overlap" in line)
    assert (ov.violations.polygon == 0).sum() == 65535  # the first pairs in polygon order
    # boxes of 100 nm at a 30 nm pitch on a 128 x 128 lattice: each overlaps the 48 within 3 steps, about 3.8e5
    # pairs, above the cap (262,144 > 4 x 16,384); the lattice stencil and the STRtree keep the same first pairs
    i, j = np.meshgrid(np.arange(128), np.arange(128), indexing="ij")
    grid = flat(list(box[None, :, :] + (30 * np.stack([i.ravel(), j.ravel()], 1))[:, None, :]))
    rules = RuleSet("g", (LayerRules(1, 0, forbid_overlap=True),))
    lat, tree = check_mask(grid, rules, method="auto"), check_mask(grid, rules, method="tree")
    a, b = result(lat, "overlap"), result(tree, "overlap")
    assert a.method.startswith("lattice") and b.method == "strtree"
    assert a.count == b.count == MAX_PAIRS and a.count_is_lower_bound and b.count_is_lower_bound
    assert np.array_equal(a.violations.polygon, b.violations.polygon)
    assert np.array_equal(a.violations.other, b.violations.other)
