"""Tests of metalay.mask.process: bias, tone inversion, write fields, marks, dose datatypes, Babinet slot estimate."""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from metalay.cells.library import CellLibrary, CellSpec
from metalay.design.lattice import Aperture, Lattice, sample_sites
from metalay.errors import DesignError, GeometryError, LibraryError
from metalay.io.writer import MAX_GDS_VERTICES, GdsStream
from metalay.mask.layout import element_offsets, snap_centres
from metalay.mask.process import (
    WriteFieldGrid,
    alignment_marks,
    aperture_region_db,
    babinet_slot_library,
    babinet_slot_response,
    bias_outline_nm,
    biased_dims_nm,
    check_marks_clear,
    complement_bands,
    complement_tile,
    default_mark_positions_um,
    dose_datatype_lut,
    field_cell_name,
    field_index,
    find_cell_at_dims,
    fit_write_fields,
    offset_convex_polygons,
    pieces_by_vertex_count,
    shift_phase_error_rad,
    straddles_write_field,
)

SQ2 = math.sqrt(2.0)


def rect(length, width):
    hl, hw = length / 2, width / 2
    return np.array([[hl, hw], [-hl, hw], [-hl, -hw], [hl, -hw]], dtype=np.float64)


def shoelace(v):
    v = np.asarray(v, dtype=np.float64)
    x, y = v[..., 0], v[..., 1]
    return 0.5 * np.sum(x * np.roll(y, -1, -1) - np.roll(x, -1, -1) * y, axis=-1)


def perimeter(v):
    v = np.asarray(v, dtype=np.float64)
    return np.sum(np.hypot(*(np.roll(v, -1, -2) - v).T), axis=0)


# ------------------------------------------------------------------------------------------------------------------
# Bias
# ------------------------------------------------------------------------------------------------------------------

@settings(max_examples=60, deadline=None, derandomize=True)
@given(length=st.floats(100, 400), width=st.floats(40, 120), bias=st.floats(-15, 15),
       theta=st.floats(0, math.pi))
def test_bias_square_corners_area_closed_form_rotated_snapped(length, width, bias, theta):
    # Closed form: a rectangle whose four edges move out by b is (L + 2b) x (W + 2b) (elementary geometry).
    biased = bias_outline_nm(rect(length, width), bias, corner="sharp")
    exact = (length + 2 * bias) * (width + 2 * bias)
    assert shoelace(biased) == pytest.approx(exact, rel=1e-12)
    snapped = element_offsets(biased, np.array([theta]), 1.0)[0]
    # Snapping moves each vertex by at most sqrt(2)/2 unit: area change <= perimeter * sqrt(2)/2 (1 nm grid).
    assert abs(shoelace(snapped) - exact) <= perimeter(biased) * SQ2 / 2
    # rotation commutes with the offset: bias-then-rotate equals rotate-then-bias (exact, before snapping)
    c, s = math.cos(theta), math.sin(theta)
    rot = np.array([[c, -s], [s, c]])
    a = biased @ rot.T
    b = offset_convex_polygons(rect(length, width) @ rot.T, bias, corner="sharp")
    np.testing.assert_allclose(a, b, atol=1e-9)


@settings(max_examples=40, deadline=None, derandomize=True)
@given(length=st.floats(100, 400), width=st.floats(40, 120), bias=st.floats(0.5, 20))
def test_bias_chamfer_area_closed_form(length, width, bias):
    # Closed form: each right-angle corner loses an isosceles right triangle of legs 2 b tan(pi/8), i.e. area
    # b^2 (sqrt(2) - 1)^2 (elementary geometry; tan(pi/8) = sqrt(2) - 1).
    biased = bias_outline_nm(rect(length, width), bias, corner="chamfer")
    assert biased.shape == (8, 2)
    exact = (length + 2 * bias) * (width + 2 * bias) - 4 * (SQ2 - 1) ** 2 * bias ** 2
    assert shoelace(biased) == pytest.approx(exact, rel=1e-12)
    # the chamfered outline contains the round offset (isotropic growth) and lies inside the sharp one
    r = shapely.Polygon(rect(length, width))
    round_offset = r.buffer(bias, quad_segs=64)
    chamfer = shapely.Polygon(biased)
    sharp = shapely.Polygon(bias_outline_nm(rect(length, width), bias, corner="sharp"))
    assert shapely.difference(round_offset, chamfer).area < 1e-6 * round_offset.area
    assert shapely.difference(chamfer, sharp).area < 1e-9 * sharp.area


def test_bias_matches_reference_library_offsets():
    # Reference: shapely (GEOS) buffer with mitre joins is the sharp-corner parallel offset.
    ell_t = 2 * np.pi * np.arange(64) / 64
    ellipse = np.stack([120 * np.cos(ell_t), 40 * np.sin(ell_t)], axis=1)
    for outline in (rect(250, 85), ellipse):
        for b in (-10.0, -3.0, 4.0, 12.0):
            ours = shapely.Polygon(bias_outline_nm(outline, b, corner="sharp"))
            ref = shapely.Polygon(outline).buffer(b, join_style="mitre", mitre_limit=100.0)
            assert shapely.symmetric_difference(ours, ref).area < 1e-6 * ref.area


def test_bias_shrink_is_the_same_for_both_corner_modes_and_collapse_is_refused():
    a = bias_outline_nm(rect(250, 85), -10, corner="sharp")
    b = bias_outline_nm(rect(250, 85), -10, corner="chamfer")
    np.testing.assert_allclose(a, b)
    assert shoelace(a) == pytest.approx(230 * 65)
    with pytest.raises(DesignError, match=r"mask\.bias_nm.*allowed > -42\.5"):
        bias_outline_nm(rect(250, 85), -43, where="d.toml")
    with pytest.raises(GeometryError):
        offset_convex_polygons(rect(250, 85)[::-1], 2.0)  # clockwise input


def test_biased_dims_and_library_lookup():
    lib = _library([CellSpec("fin", "nanofin", "fins", (("length_nm", 250.0), ("width_nm", 85.0))),
                    CellSpec("fin+5", "nanofin", "fins", (("length_nm", 260.0), ("width_nm", 95.0)))])
    dims = biased_dims_nm(lib.cells[0], 5.0)
    assert dims == {"length_nm": 260.0, "width_nm": 95.0}
    assert find_cell_at_dims(lib, "nanofin", dims) == 1
    assert find_cell_at_dims(lib, "nanofin", biased_dims_nm(lib.cells[0], 3.0)) is None
    assert find_cell_at_dims(lib, "slot", dims) is None


# ------------------------------------------------------------------------------------------------------------------
# Tone inversion
# ------------------------------------------------------------------------------------------------------------------

def _fins(aperture, lattice, *, seed=0, length=250.0, width=85.0):
    sites = sample_sites(aperture, lattice)
    rng = np.random.default_rng(seed)
    theta = rng.uniform(0, np.pi, len(sites))
    return snap_centres(sites.x_um, sites.y_um, 1.0), element_offsets(rect(length, width), theta, 1.0)


def _invert(aperture, lattice, centres, offsets, region, *, rows, max_vertices=MAX_GDS_VERTICES):
    reach = float(np.abs(offsets).max()) * SQ2 + 1
    tiles = []
    for band in complement_bands(region, lattice, aperture, db_unit_nm=1.0, reach_nm=reach, rows_per_band=rows):
        tiles.append(complement_tile(centres, offsets, region, band.box_db, max_vertices=max_vertices,
                                     verify=True))
    return tiles


@pytest.mark.parametrize("shape,lattice_kind,rows,max_vertices", [
    ("circle", "square", 8, MAX_GDS_VERTICES),
    ("circle", "hexagonal", 5, MAX_GDS_VERTICES),
    ("annulus", "square", 40, MAX_GDS_VERTICES),  # inner hole inside one band: the extra cut-line path
    ("square", "square", 40, 60),  # tiny vertex limit: horizontal splitting path
])
def test_tone_inversion_area_validity_vertex_limit(shape, lattice_kind, rows, max_vertices):
    aperture = {"circle": Aperture("circle", diameter_um=8.0), "square": Aperture("square", width_um=6.0),
                "annulus": Aperture("annulus", diameter_um=9.0, inner_diameter_um=2.0)}[shape]
    lattice = Lattice(lattice_kind, 325.0)
    centres, offsets = _fins(aperture, lattice)
    region = aperture_region_db(aperture, db_unit_nm=1.0)
    tiles = _invert(aperture, lattice, centres, offsets, region, rows=rows, max_vertices=max_vertices)
    polys = np.concatenate([t.polygons() for t in tiles])
    xy = np.concatenate([t.xy_db for t in tiles])
    assert np.issubdtype(xy.dtype, np.integer)
    # GDSII limit: 8191 XY points per element incl. the closing point.
    # Source: Calma Company 1987, GDSII Stream Format Manual Release 6.0 (BOUNDARY: up to 8191 XY points)
    assert max(t.max_vertices for t in tiles) <= max_vertices
    assert np.all(shapely.is_valid(polys)) and np.all(shapely.get_num_interior_rings(polys) == 0)
    assert np.all(shapely.is_ccw(shapely.get_exterior_ring(polys)))
    union = shapely.union_all(polys)
    area_sum = float(np.sum(shapely.area(polys)))
    elements = shapely.polygons((centres[:, None, :] + offsets).astype(np.float64))
    structures = shapely.union_all(elements)
    perim = float(shapely.length(region) + np.sum(shapely.length(elements)))
    grid_bound = perim * SQ2 / 2  # every vertex within half a unit per coordinate of the exact boundary
    # no overlaps between output polygons (sum of areas equals the area of their union)
    assert area_sum - union.area <= 1e-6 * area_sum
    # area(complement) + area(structures) = area(region) within the grid error
    assert abs(area_sum + structures.area - region.area) <= grid_bound
    # union of the output equals region - structures: XOR area within the grid error
    exact = shapely.difference(region, structures)
    xor = shapely.symmetric_difference(union, exact).area
    assert xor <= grid_bound
    assert xor == pytest.approx(sum(t.xor_area_db2 for t in tiles), rel=1e-6, abs=1.0)
    assert all(t.xor_area_db2 <= t.xor_bound_db2 for t in tiles)
    assert sum(t.target_area_db2 for t in tiles) == pytest.approx(exact.area, rel=1e-9)


def test_tone_inversion_region_hole_without_cut_line_is_split():
    # A region hole that no element-centre cut line crosses (elements only left and right of it) must still give
    # hole-free output: the fallback cuts through the hole.
    region = shapely.Polygon([(0, 0), (6000, 0), (6000, 3000), (0, 3000)],
                             [[(2500, 1000), (2500, 2000), (3500, 2000), (3500, 1000)]])
    xs = np.array([500, 1000, 5000, 5500])
    centres = np.stack(np.meshgrid(xs, [500, 1500, 2500]), -1).reshape(-1, 2).astype(np.int64)
    offsets = np.broadcast_to(rect(200, 80).astype(np.int32), (len(centres), 4, 2))
    tile = complement_tile(centres, offsets, region, (0, 0, 6000, 3000), verify=True)
    polys = tile.polygons()
    assert np.all(shapely.get_num_interior_rings(polys) == 0) and np.all(shapely.is_valid(polys))
    exact = shapely.difference(region, shapely.union_all(shapely.polygons((centres[:, None] + offsets)
                                                                          .astype(float))))
    assert shapely.symmetric_difference(shapely.union_all(polys), exact).area <= tile.xor_bound_db2
    assert tile.area_db2 == pytest.approx(exact.area, abs=tile.xor_bound_db2)


def test_tone_inversion_overlapping_elements_are_merged():
    # Elements that overlap (e.g. after a large bias) are united before the difference.
    centres = np.array([[0, 0], [150, 0], [1000, 0]], dtype=np.int64)
    offsets = np.broadcast_to(rect(250, 85).astype(np.int32), (3, 4, 2))
    tile = complement_tile(centres, offsets, None, (-500, -300, 1500, 300), verify=True)
    union = shapely.union_all(shapely.polygons((centres[:, None] + offsets).astype(float)))
    assert tile.area_db2 == pytest.approx(2000 * 600 - union.area, abs=tile.xor_bound_db2)
    assert tile.xor_area_db2 <= tile.xor_bound_db2


def test_tone_inversion_output_passes_design_rules_when_available(tmp_path):
    rules = pytest.importorskip("metalay.checks.rules")
    aperture = Aperture("circle", diameter_um=6.0)
    lattice = Lattice("square", 325.0)
    centres, offsets = _fins(aperture, lattice)
    region = aperture_region_db(aperture, db_unit_nm=1.0)
    tiles = _invert(aperture, lattice, centres, offsets, region, rows=6)
    path = tmp_path / "complement.gds"
    with GdsStream(path, "TONE", db_unit_nm=1.0) as gs:
        for t in tiles:
            for _v, verts in pieces_by_vertex_count(t):
                gs.boundaries(1, 0, verts)
    from metalay.io.gdsread import read_mask

    flat = read_mask(path)
    assert flat.count == sum(t.count for t in tiles)
    # Complement pieces tile the region and share cut edges by design, so the overlap rule does not apply;
    # check validity (self-intersection, degeneracy), the GDSII vertex limit and the 1 nm grid.
    layer = rules.LayerRules(layer=1, datatype=0, name="complement", check_validity=True,
                             max_vertices=MAX_GDS_VERTICES, grid_nm=1.0)
    report = rules.check_mask(flat, rules.RuleSet(name="tone", layers=(layer,)))
    assert {r.rule for r in report.results} >= {"validity", "vertices", "grid"}
    assert report.clean, report.summary_lines()


def test_tone_inversion_written_gds_reads_back(tmp_path):
    gdstk = pytest.importorskip("gdstk")
    aperture = Aperture("circle", diameter_um=5.0)
    lattice = Lattice("square", 325.0)
    centres, offsets = _fins(aperture, lattice)
    region = aperture_region_db(aperture, db_unit_nm=1.0)
    tiles = _invert(aperture, lattice, centres, offsets, region, rows=4)
    path = tmp_path / "c.gds"
    with GdsStream(path, "TONE", db_unit_nm=1.0) as gs:
        for t in tiles:
            for v, verts in pieces_by_vertex_count(t):
                assert verts.shape[1:] == (v, 2)
                gs.boundaries(1, 0, verts)
    lib = gdstk.read_gds(str(path))
    polys = lib.top_level()[0].polygons
    assert len(polys) == sum(t.count for t in tiles)
    total = sum(p.area() for p in polys) * 1e6  # um^2 -> nm^2
    assert total == pytest.approx(sum(t.area_db2 for t in tiles), rel=1e-9)


def test_complement_bands_share_edges_and_cover_the_region():
    aperture = Aperture("circle", diameter_um=20.0)
    lattice = Lattice("hexagonal", 400.0)
    region = aperture_region_db(aperture, db_unit_nm=1.0)
    field = WriteFieldGrid.from_um(3.0, (0.7, 0.2), db_unit_nm=1.0)
    bands = complement_bands(region, lattice, aperture, db_unit_nm=1.0, reach_nm=150, rows_per_band=7, field=field)
    y = [(b.box_db[1], b.box_db[3]) for b in bands]
    assert y[0][0] == -10000 and y[-1][1] == 10000
    assert all(a[1] == b[0] for a, b in zip(y[:-1], y[1:]))
    edges = np.array([b.box_db[1] for b in bands[1:]])
    fy = 200 + 3000 * np.arange(-4, 4)
    assert set(fy[(fy > -10000) & (fy < 10000)]) <= set(edges.tolist())
    pitch = 400 * math.sqrt(3) / 2
    for b in bands:  # every row whose elements can reach the band is sampled
        j0, j1 = b.rows
        assert j0 * pitch <= b.box_db[1] - 150 + pitch and (j1 - 1) * pitch >= min(b.box_db[3] + 150 - pitch,
                                                                                  9.99e3 - pitch)


# ------------------------------------------------------------------------------------------------------------------
# Write fields
# ------------------------------------------------------------------------------------------------------------------

def _brute_straddles(centres, offsets, grid, extent):
    """Independent count: an element straddles when it overlaps the interiors of two or more field boxes."""
    polys = [shapely.Polygon(c + o) for c, o in zip(centres, offsets)]
    (w, h), (ox, oy) = grid.size_db, grid.origin_db
    kx = range(math.floor((-extent - ox) / w) - 1, math.ceil((extent - ox) / w) + 1)
    ky = range(math.floor((-extent - oy) / h) - 1, math.ceil((extent - oy) / h) + 1)
    boxes = [shapely.box(ox + i * w, oy + j * h, ox + (i + 1) * w, oy + (j + 1) * h) for i in kx for j in ky]
    out = []
    for p in polys:  # brute force on purpose (independent of the vectorised code)
        bb = shapely.box(*p.bounds)
        out.append(sum(1 for b in boxes if bb.intersection(b).area > 0) > 1)
    return np.array(out)


@pytest.mark.parametrize("mode", ["shift", "shift-or-drop", "drop", "keep"])
def test_write_fields_counts_and_no_straddle(mode):
    aperture = Aperture("square", width_um=12.0)
    lattice = Lattice("square", 325.0)
    centres, offsets = _fins(aperture, lattice, seed=3)
    grid = WriteFieldGrid.from_um(2.5, (0.31, -0.47), db_unit_nm=1.0)
    brute = _brute_straddles(centres, offsets, grid, 6500)
    assert brute.sum() > 20
    fit = fit_write_fields(centres, offsets, grid, mode=mode, max_shift_db=130, min_gap_db=40)
    assert np.array_equal(fit.straddling, brute)
    assert fit.n_straddling == int(brute.sum())
    after = straddles_write_field(fit.centres_db, offsets, grid)
    if mode == "keep":
        assert fit.n_kept_straddling == fit.n_straddling and fit.keep.all()
        return
    if mode == "shift":  # nothing is left out: an element that cannot be shifted stays where it is, counted
        assert fit.keep.all() and fit.n_dropped == 0
        assert fit.n_shifted + fit.n_kept_straddling == fit.n_straddling and fit.n_kept_straddling > 0
        assert int(after.sum()) == fit.n_kept_straddling
        assert not np.any(after & np.any(fit.shift_db != 0, axis=1))  # every shifted element fits one field
    else:
        assert not np.any(after & fit.keep)  # no kept element straddles
        assert fit.n_shifted + fit.n_dropped == fit.n_straddling
        assert int((~fit.keep).sum()) == fit.n_dropped
    if mode == "drop":
        assert fit.n_dropped == fit.n_straddling and not fit.shift_db.any()
        return
    assert fit.n_shifted > 0
    moved = np.flatnonzero(np.any(fit.shift_db != 0, axis=1))
    assert np.all(np.hypot(*fit.shift_db[moved].T) <= 130)
    # each shift is the smaller of the two that clear the boundary, or the other one when the gap rule forbids it
    lo = (centres + offsets.min(axis=1))
    hi = (centres + offsets.max(axis=1))
    for ax in (0, 1):
        s = fit.shift_db[moved, ax]
        nz = s != 0
        bnd = np.where(s[nz] < 0, hi[moved[nz], ax] + s[nz], lo[moved[nz], ax] + s[nz])
        assert np.all((bnd - grid.origin_db[ax]) % grid.size_db[ax] == 0)
    # gaps after the shift: brute force over all pairs with a moved element
    polys = shapely.polygons((fit.centres_db[:, None, :] + offsets).astype(np.float64))
    before = shapely.polygons((centres[:, None, :] + offsets).astype(np.float64))
    kept = np.flatnonzero(fit.keep)
    for m in moved:  # moved elements only (tens)
        others = kept[kept != m]
        d_now = shapely.distance(polys[m], polys[others])
        d_before = shapely.distance(before[m], before[others])
        assert np.all(d_now >= np.minimum(40.0, d_before) - 1e-9)


def test_write_field_index_names_and_phase_error():
    grid = WriteFieldGrid((1000, 2000), (100, -50))
    idx = field_index(np.array([[100, -50], [99, -51], [1100, 1949], [1100, 1950]]), grid)
    assert idx.tolist() == [[0, 0], [-1, -1], [1, 0], [1, 1]]  # a point on a boundary belongs to the upper field
    assert field_cell_name("demo", -1, 2) == "demo_WF_XM1_Y2"
    # a 4 degree tilt at 532 nm: |grad phi| = 2 pi sin(4 deg) / 0.532 um (grating equation); 100 nm shift
    g = 2 * np.pi * math.sin(math.radians(4)) / 0.532
    err = shift_phase_error_rad(np.array([[60, 80]]), np.array([g]), db_unit_nm=1.0)
    assert err[0] == pytest.approx(g * 0.1)


# ------------------------------------------------------------------------------------------------------------------
# Marks, dose datatypes
# ------------------------------------------------------------------------------------------------------------------

def test_alignment_marks_shapes_and_clearance():
    aperture = Aperture("circle", diameter_um=300.0)
    pos = default_mark_positions_um(aperture, frame_margin_um=10, frame_width_um=5, size_um=100, gap_um=20)
    marks = alignment_marks("cross", pos, size_um=100, line_width_um=10, db_unit_nm=1.0, layer=4, datatype=0)
    assert len(marks) == 4 and all(m.layer == 4 and m.xy_db.shape == (12, 2) for m in marks)
    # plus sign: area = 2 s w - w^2 (elementary geometry)
    assert all(shoelace(m.xy_db) == pytest.approx(2 * 100000 * 10000 - 10000 ** 2) for m in marks)
    sq = alignment_marks("square", pos, size_um=50, line_width_um=1, db_unit_nm=1.0, layer=4, datatype=1)
    assert all(shoelace(m.xy_db) == pytest.approx(50000.0 ** 2) for m in sq)
    keepout = shapely.box(-165000, -165000, 165000, 165000)  # frame outer edge
    check_marks_clear(marks, keepout)
    bad = alignment_marks("square", [[100.0, 0.0]], size_um=10, line_width_um=1, db_unit_nm=1.0, layer=4,
                          datatype=0)
    with pytest.raises(DesignError, match="overlaps"):
        check_marks_clear(bad, keepout, where="d.toml")


def test_dose_datatype_lut():
    classes = ["fin-a", "fin-b", "frame", "label", "marks"]
    lut = dose_datatype_lut(classes, {"fin-b": 3, "marks": 7}, 0)
    assert lut.tolist() == [0, 3, 0, 0, 7]
    cell_index = np.array([0, 1, 1, 0])
    assert lut[cell_index].tolist() == [0, 3, 3, 0]
    with pytest.raises(DesignError, match="unknown structure class"):
        dose_datatype_lut(classes, {"fin-c": 1}, 0, where="d.toml")
    with pytest.raises(DesignError, match="0..255"):
        dose_datatype_lut(classes, {"fin-a": 300}, 0)


# ------------------------------------------------------------------------------------------------------------------
# Babinet slot estimate
# ------------------------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("ratio,period_over_lambda", [(0.1, 0.2), (0.3, 0.1), (0.5, 0.3)])
def test_babinet_against_strip_grating_formulas(ratio, period_over_lambda):
    # Thin perfectly conducting strip gratings at long wavelength, normalised shunt elements on a line:
    # inductive strips of width d (E along the strips): X = (a/lambda) ln csc(pi d / 2a);
    # capacitive strips with gaps d (E across, the complementary screen): B = (4a/lambda) ln csc(pi d / 2a).
    # From memory: Marcuvitz 1951, Waveguide Handbook (MIT Rad. Lab. Series vol. 10), sec. 5.18-5.19.
    # A shunt admittance Y on a matched line transmits t = 2 / (2 + Y) (transmission-line theory; Pozar 2012,
    # Microwave Engineering, 4th ed., sec. 4.3).
    def inductive(strip_fraction):  # E along strips of width fraction * a
        x = period_over_lambda * math.log(1 / math.sin(math.pi * strip_fraction / 2))
        return 2 / (2 + 1 / (1j * x))

    def capacitive(gap_fraction):  # E across strips separated by gaps of width fraction * a
        b = 4 * period_over_lambda * math.log(1 / math.sin(math.pi * gap_fraction / 2))
        return 2 / (2 + 1j * b)

    # antenna: metal strips of width d = ratio * a; its complement: slits of width d in a metal film
    t_ant_long = inductive(ratio)  # E along the strips
    t_ant_short = capacitive(1 - ratio)  # E across: gaps a - d
    t_slit_long = inductive(1 - ratio)  # E along the slits: metal strips of width a - d
    t_slit_short = capacitive(ratio)  # E across the slits: gaps d
    t_slot_long, t_slot_short = babinet_slot_response(t_ant_long, t_ant_short)
    assert t_slot_short == pytest.approx(t_slit_short, abs=1e-12)
    assert t_slot_long == pytest.approx(t_slit_long, abs=1e-12)
    # the estimate is not trivially 1 - t: the polarisations are exchanged
    assert abs(t_slot_short - (1 - t_ant_short)) > 1e-3


def test_babinet_slot_library_keeps_converted_amplitude_and_is_labelled():
    # Invented antenna responses (demo data only) of a 30 nm gold layer at 800-850 nm (a thin, opaque metal).
    wl = np.array([800.0, 825.0, 850.0])
    tl = np.array([[0.6 + 0.3j, 0.55 + 0.35j, 0.5 + 0.4j]])
    ts = np.array([[0.9 - 0.1j, 0.85 - 0.2j, 0.8 - 0.25j]])
    pl = np.array([[0.5, 0.45, 0.45]])
    ps = np.array([[0.85, 0.8, 0.75]])
    lib = _library([CellSpec("fin", "nanofin", "metal", (("length_nm", 200.0), ("width_nm", 50.0)))],
                   wl=wl, tl=tl, ts=ts, pl=pl, ps=ps)
    slot = babinet_slot_library(lib)
    assert slot.cells[0].kind == "slot" and slot.cells[0].dim("length_nm") == 200.0
    np.testing.assert_allclose((slot.t_long - slot.t_short) / 2, (tl - ts) / 2)
    np.testing.assert_allclose(slot.t_long, 1 - ts)
    np.testing.assert_allclose(slot.power_long, 1 - ps)
    assert "Babinet" in slot.provenance["responses_source"] and "Booker 1946" in slot.provenance["responses_source"]
    with pytest.raises(LibraryError, match="geometry only"):
        babinet_slot_library(_library(lib.cells))


def test_babinet_estimate_that_is_not_physical_is_refused():
    # Source: Poynting's theorem (a passive screen): |t_slot|^2 = |1 - t_antenna|^2 must stay <= 1; invented
    # antenna responses (demo data) whose complement would gain power are refused, naming cell and wavelength.
    wl = np.array([800.0, 825.0, 850.0])
    tl = np.array([[0.1 + 0.6j, 0.1 + 0.6j, 0.1 + 0.6j]])
    ts = np.array([[0.9 + 0.0j, 0.9 + 0.0j, 0.9 + 0.0j]])
    lib = _library([CellSpec("fin", "nanofin", "metal", (("length_nm", 200.0), ("width_nm", 50.0)))],
                   wl=wl, tl=tl, ts=ts)
    with pytest.raises(LibraryError, match="slot-fin.* at 800 nm: \\|t_short\\|\\^2 = 1.17"):
        babinet_slot_library(lib)


@pytest.mark.parametrize("material,thickness_nm,match", [
    ("TiO2", 30.0, "not a metal"),        # dielectric: Re(eps) ~ +6
    ("Au", 120.0, "not thin"),            # 120 nm > lambda/10 = 80 nm
    ("Au", 12.0, "skin depth"),           # thinner than lambda/(2 pi kappa) ~ 26 nm: the film transmits
])
def test_babinet_refuses_screens_that_are_not_thin_conductors(material, thickness_nm, match):
    # Source: Booker 1946, J. IEE 93 (IIIA), 620: the principle holds for thin, perfectly conducting screens.
    # Gold: Re(eps) ~ -25, kappa ~ 5 near 825 nm (Rakic et al. 1998, Appl. Opt. 37, 5271); TiO2 eps ~ +6.
    wl = np.array([800.0, 825.0, 850.0])
    t = np.full((1, 3), 0.5 + 0j)
    lib = _library([CellSpec("fin", "nanofin", "metal", (("length_nm", 200.0), ("width_nm", 50.0)))],
                   wl=wl, tl=t, ts=t, pl=None, ps=None, material=material, thickness_nm=thickness_nm)
    with pytest.raises(LibraryError, match=match) as ei:
        babinet_slot_library(lib)
    assert "Booker 1946" in str(ei.value) and "\n" not in str(ei.value)


def _library(cells, wl=None, tl=None, ts=None, pl=None, ps=None, material="Au", thickness_nm=30.0):
    layers = ({"name": "metal", "material": material, "thickness_nm": thickness_nm, "patterned": True},)
    return CellLibrary(name="t", description="test", mode="transmission", phase_mechanism="geometric",
                       design_wavelength_nm=825.0, period_nm=300.0, lattice="square", incident_medium="air",
                       exit_medium="air", layers=layers, rules={}, provenance={}, cells=tuple(cells),
                       wavelengths_nm=wl, t_long=tl, t_short=ts, power_long=pl, power_short=ps)
