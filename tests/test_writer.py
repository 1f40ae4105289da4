"""Mask writing: GDSII records, gdstk read-back, determinism."""

import gdstk
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from metalay.io.writer import GdsStream, build_gdstk_flat, gds_real8, write_gdstk_library
from metalay.mask.layout import Polygon, element_offsets, group_shapes, recovered_rotation, snap_centres
from metalay.mask.mapping import wrap_pi

from gds_minimal import first_boundaries, real8


@pytest.mark.parametrize("value", [1e-3, 1e-9, 1.0, 0.5, 1e-6, 2.5e-10, -3.75, 123456.789])
def test_real8_roundtrip_independent_decoder(value):
    # Source: Calma GDSII Stream Format Manual, Release 6.0 (1987), 8-byte real: 16^(e-64) * m / 2^56
    assert real8(gds_real8(value)) == pytest.approx(value, rel=2 ** -52)


def test_real8_matches_gdstk_units_record(tmp_path):
    # Reference library: gdstk (general-purpose GDSII library) writes the UNITS record of a 1 um / 1 nm library;
    # our encoder must give the same 16 bytes (1e-3 rounds to ...A7F0, 1e-9 to ...5A54).
    lib = gdstk.Library(unit=1e-6, precision=1e-9)
    lib.new_cell("A")
    lib.write_gds(str(tmp_path / "u.gds"))
    data = (tmp_path / "u.gds").read_bytes()
    at = data.find(bytes([0, 20, 3, 5]))
    assert data[at + 4:at + 20] == gds_real8(1e-3) + gds_real8(1e-9)


def _fins(n, seed=1):
    rng = np.random.default_rng(seed)
    theta = rng.uniform(0, np.pi, n)
    x = rng.integers(-50, 50, n) * 0.325
    y = rng.integers(-50, 50, n) * 0.325
    outline = np.array([[125.0, 42.5], [-125.0, 42.5], [-125.0, -42.5], [125.0, -42.5]])
    return theta, snap_centres(x, y, 1.0), element_offsets(outline, theta, 1.0)


def test_stream_writer_read_back_by_gdstk_and_minimal_parser(tmp_path):
    theta, centres, offsets = _fins(500)
    path = tmp_path / "m.gds"
    with GdsStream(path, "TOP", db_unit_nm=1.0) as w:
        w.boundaries(1, 0, centres[:, None, :] + offsets)
        w.polygons([Polygon(2, 0, np.array([[0, 0], [10, 0], [10, 10], [0, 10]]))])
    lib = gdstk.read_gds(str(path))
    assert lib.unit == pytest.approx(1e-6) and lib.precision == pytest.approx(1e-9)
    (cell,) = lib.cells
    fins = [p for p in cell.polygons if p.layer == 1]
    assert len(fins) == 500 and len(cell.polygons) == 501
    pts = np.array([p.points for p in fins]) * 1000.0
    assert np.array_equal(np.rint(pts).astype(np.int64), centres[:, None, :] + offsets)
    # every element's rotation from the file is within the snapping bound of the intended rotation
    # Common practice (no source): rounding each vertex by <= 0.5 nm (0.71 nm diagonal) turns a fin whose long
    # axis joins edge midpoints 250 nm apart by at most atan(2 * 0.71 / 250) ~ 0.33 deg
    rec = recovered_rotation(np.rint(pts).astype(np.int64) - centres[:, None, :])
    assert np.degrees(np.abs(wrap_pi(2 * (rec - theta))) / 2).max() < 0.33
    # independent minimal parser: header, units, first elements
    info, elements = first_boundaries(path.read_bytes(), 3)
    assert info["HEADER"] == [600] and info["STRNAME"] == "TOP"
    assert info["UNITS"][0] == pytest.approx(1e-3) and info["UNITS"][1] == pytest.approx(1e-9)
    for k, el in enumerate(elements):
        assert el["layer"] == 1 and el["datatype"] == 0
        assert len(el["xy"]) == 5 and el["xy"][0] == el["xy"][-1]
        assert np.array_equal(np.array(el["xy"][:4]), centres[k] + offsets[k])


def test_stream_writer_is_atomic(tmp_path):
    path = tmp_path / "m.gds"
    with pytest.raises(RuntimeError):
        with GdsStream(path, "TOP") as w:
            w.boundaries(1, 0, np.zeros((3, 4, 2), dtype=np.int64))
            raise RuntimeError("interrupted")
    assert list(tmp_path.iterdir()) == []


@given(theta=st.floats(0, np.pi, exclude_max=True), length=st.floats(60, 400), width=st.floats(30, 200))
def test_snapped_fin_is_centrally_symmetric_and_inside_cell(theta, length, width):
    outline = np.array([[length, width], [-length, width], [-length, -width], [length, -width]]) / 2
    off = element_offsets(outline, np.array([theta]), 1.0)[0]
    assert np.array_equal(off[2], -off[0]) and np.array_equal(off[3], -off[1])
    # no vertex moves more than half a grid unit per axis, so the snapped fin never leaves a cell that holds the
    # exact fin with 1 nm to spare (Common practice (no source))
    c, s = np.cos(theta), np.sin(theta)
    exact = outline @ np.array([[c, s], [-s, c]])
    assert np.abs(off - exact).max() <= 0.5 + 1e-9


def test_group_shapes_is_lossless():
    _, _, offsets = _fins(5000, seed=3)
    g = group_shapes(offsets)
    assert np.array_equal(g.shapes_db[g.shape_of_site], offsets)
    assert len(g.shapes_db) < 5000


def test_gdstk_flat_and_oasis_equal_stream(tmp_path):
    theta, centres, offsets = _fins(800, seed=5)
    g = group_shapes(offsets)
    groups = [(1, 0, g.shapes_db[k], centres[g.shape_of_site == k]) for k in range(len(g.shapes_db))]
    lib = build_gdstk_flat("TOP", groups, [], db_unit_nm=1.0)
    write_gdstk_library(lib, tmp_path / "m.oas", "oas")
    back = gdstk.read_oas(str(tmp_path / "m.oas"))
    got = []
    for p in back.top_level()[0].polygons:
        offs = p.repetition.get_offsets() if p.repetition.size else np.zeros((1, 2))
        for o in offs:
            got.append(np.rint((p.points + o) * 1000).astype(np.int64))
    got = np.array(got)
    want = centres[:, None, :] + offsets

    def key(a):
        return np.lexsort(a.reshape(len(a), -1).T)

    assert len(got) == 800
    assert np.array_equal(got[key(got)], want[key(want)])
