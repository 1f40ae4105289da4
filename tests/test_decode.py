"""Mask decoding: polygons -> (site, cell, rotation), from constructed FlatPolygons and from a gdstk-written file."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from metalay.cells.library import CellSpec
from metalay.checks import decode
from metalay.errors import MaskReadError
from metalay.io.gdsread import FlatPolygons, read_mask

FIN = CellSpec(id="fin", kind="nanofin", layer="TiO2", dims_nm=(("length_nm", 250.0), ("width_nm", 85.0)))
SMALL = CellSpec(id="fin2", kind="nanofin", layer="TiO2", dims_nm=(("length_nm", 200.0), ("width_nm", 60.0)))
PILLAR = CellSpec(id="pil", kind="elliptic_pillar", layer="TiO2", dims_nm=(("major_nm", 220.0), ("minor_nm", 90.0)))


def fins_db(cx_nm, cy_nm, theta, length=250.0, width=85.0):
    """Rotated rectangles snapped about integer centres (half-to-even), as the mask contract says."""
    corners = np.array([[0.5, 0.5], [-0.5, 0.5], [-0.5, -0.5], [0.5, -0.5]]) * [length, width]
    c, s = np.cos(theta)[:, None], np.sin(theta)[:, None]
    vx = c * corners[:, 0] - s * corners[:, 1]
    vy = s * corners[:, 0] + c * corners[:, 1]
    xy = np.stack([np.rint(vx) + np.asarray(cx_nm)[:, None], np.rint(vy) + np.asarray(cy_nm)[:, None]], axis=-1)
    return xy.reshape(-1, 2).astype(np.int64)


def test_quadrilateral_decoding_on_square_lattice():
    rng = np.random.default_rng(7)
    jj, ii = np.divmod(np.arange(400), 20)
    ii, jj = ii - 10, jj - 10
    theta = rng.uniform(0, np.pi, ii.size)
    xy = fins_db(ii * 325, jj * 325, theta)
    flat = FlatPolygons.from_arrays(1, 0, np.full(ii.size, 4), xy)
    dec = decode.decode_sites(flat, [FIN, SMALL], period_nm=325.0)
    assert len(dec) == 400 and dec.stats["duplicates"] == 0 and dec.stats["off_lattice"] == 0
    order = np.lexsort((ii, jj))
    assert np.array_equal(dec.i, ii[order]) and np.array_equal(dec.j, jj[order])
    assert np.all(dec.cell == 0)
    # Common practice (no source): 1 nm snapping of a 250 nm edge bounds the angle error by ~atan(1/250) ~ 0.23 deg
    d = np.angle(np.exp(2j * (dec.rotation_rad - theta[order]))) / 2
    assert np.max(np.abs(np.degrees(d))) < 0.35
    assert dec.stats["max_size_error_nm"] < 1.5


@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.floats(0, np.pi, exclude_max=True), st.integers(-50, 50), st.integers(-50, 50))
def test_rotation_round_trip_property(theta, i, j):
    xy = fins_db(np.array([i * 325]), np.array([j * 325]), np.array([theta]))
    dec = decode.decode_sites(FlatPolygons.from_arrays(1, 0, [4], xy), [FIN], period_nm=325.0)
    assert (dec.i[0], dec.j[0]) == (i, j)
    err = np.angle(np.exp(2j * (dec.rotation_rad[0] - theta))) / 2
    assert abs(np.degrees(err)) < 0.35


def test_hexagonal_lattice_ngons_bias_and_policies():
    p = 400.0
    jj = np.repeat(np.arange(-3, 4), 5)
    ii = np.tile(np.arange(-2, 3), 7)
    x = (ii + 0.5 * (jj % 2)) * p
    y = jj * p * np.sqrt(3) / 2
    theta = np.linspace(0.1, 3.0, ii.size)
    t = 2 * np.pi * np.arange(32) / 32
    bias = 5.0
    a, b = 110.0 + bias, 45.0 + bias
    ex = a * np.cos(t)[None, :] * np.cos(theta)[:, None] - b * np.sin(t)[None, :] * np.sin(theta)[:, None]
    ey = a * np.cos(t)[None, :] * np.sin(theta)[:, None] + b * np.sin(t)[None, :] * np.cos(theta)[:, None]
    xy = np.stack([np.rint(ex) + np.rint(x)[:, None], np.rint(ey) + np.rint(y)[:, None]], -1).reshape(-1, 2)
    flat = FlatPolygons.from_arrays(1, 0, np.full(ii.size, 32), xy)
    with pytest.raises(MaskReadError, match="bias"):
        decode.decode_sites(flat, [FIN, PILLAR], period_nm=p, lattice="hexagonal")
    dec = decode.decode_sites(flat, [FIN, PILLAR], period_nm=p, lattice="hexagonal", bias_nm=bias)
    assert np.all(dec.cell == 1) and len(dec) == ii.size
    order = np.lexsort((ii, jj))
    assert np.array_equal(dec.i, ii[order]) and np.array_equal(dec.j, jj[order])
    err = np.angle(np.exp(2j * (dec.rotation_rad - theta[order]))) / 2
    assert np.max(np.abs(np.degrees(err))) < 1.0
    dropped = decode.decode_sites(flat, [FIN, PILLAR], period_nm=p, lattice="hexagonal", unmatched="drop")
    assert len(dropped) == 0 and dropped.stats["unmatched"] == ii.size


def test_wrong_period_and_duplicates():
    xy = fins_db(np.array([0, 0, 325]), np.array([0, 0, 0]), np.array([0.1, 0.2, 0.3]))
    flat = FlatPolygons.from_arrays(1, 0, [4, 4, 4], xy)
    dec = decode.decode_sites(flat, [FIN], period_nm=325.0)
    assert dec.stats["duplicates"] == 1 and len(dec) == 2
    with pytest.raises(MaskReadError, match="lattice"):
        decode.decode_sites(FlatPolygons.from_arrays(1, 0, [4], fins_db(np.array([160]), np.array([160]),
                                                                       np.array([0.0]))), [FIN], period_nm=325.0)
    with pytest.raises(MaskReadError, match="no polygons"):
        decode.decode_sites(flat, [FIN], period_nm=325.0, layer=(5, 0))


def test_decode_from_gdstk_written_file(tmp_path):
    gdstk = pytest.importorskip("gdstk")
    rng = np.random.default_rng(2)
    n = 300
    ii = rng.integers(-40, 40, n)
    jj = rng.integers(-40, 40, n)
    key = np.unique(ii * 1000 + jj, return_index=True)[1]
    ii, jj = ii[key], jj[key]
    theta = rng.uniform(0, np.pi, ii.size)
    xy = fins_db(ii * 325, jj * 325, theta).reshape(-1, 4, 2)
    lib = gdstk.Library(unit=1e-6, precision=1e-9)
    cell = lib.new_cell("TOP")
    for pts in xy:  # test fixture: a handful of polygons
        cell.add(gdstk.Polygon(pts * 1e-3, layer=1, datatype=0))
    cell.add(gdstk.rectangle((-20, -20), (20, 20), layer=2))
    path = tmp_path / "m.gds"
    lib.write_gds(str(path))
    dec = decode.decode_sites(read_mask(path), [FIN], period_nm=325.0)
    assert len(dec) == ii.size
    order = np.lexsort((ii, jj))
    err = np.angle(np.exp(2j * (dec.rotation_rad - theta[order]))) / 2
    assert np.max(np.abs(np.degrees(err))) < 0.35


def test_chamfered_fins_match_their_fin_cell():
    # 8-vertex fins (corners chamfered by 10 nm, as a mask with chamfered bias corners has) keep length and width
    # along their principal axes, so they decode to the fin cell with the right rotation.
    theta = np.array([0.0, 0.7, 2.0])
    ch = 10.0
    L, W = 250.0, 85.0
    ring = np.array([[L / 2 - ch, W / 2], [-L / 2 + ch, W / 2], [-L / 2, W / 2 - ch], [-L / 2, -W / 2 + ch],
                     [-L / 2 + ch, -W / 2], [L / 2 - ch, -W / 2], [L / 2, -W / 2 + ch], [L / 2, W / 2 - ch]])
    c, s = np.cos(theta)[:, None], np.sin(theta)[:, None]
    vx = np.rint(c * ring[:, 0] - s * ring[:, 1]) + np.array([0, 325, 650])[:, None]
    vy = np.rint(s * ring[:, 0] + c * ring[:, 1])
    flat = FlatPolygons.from_arrays(1, 0, [8, 8, 8], np.stack([vx, vy], -1).reshape(-1, 2))
    dec = decode.decode_sites(flat, [FIN, PILLAR], period_nm=325.0)
    assert np.all(dec.cell == 0)
    err = np.angle(np.exp(2j * (dec.rotation_rad - theta))) / 2
    assert np.max(np.abs(np.degrees(err))) < 0.5


def test_quad_sizes_and_rotation_equal_float32_hypot_formula():
    # Independent calculation: sizes as sums of opposite edges from numpy's float32 hypot of the integer edge
    # differences and the rotation from arctan2 of e0 - e2 (or e1 - e3), written out per vertex; the decoder's
    # coordinate-major pass must give the same float32 / float64 values (decoded sizes and reports unchanged)
    from metalay.checks.decode import _quads

    rng = np.random.default_rng(7)
    f = np.float32
    for span in (3, 700, 70_000, 2_000_000):
        v = rng.integers(-span, span, (100_000, 4, 2))
        x0, x1, x2, x3 = (v[:, k, 0] for k in range(4))
        y0, y1, y2, y3 = (v[:, k, 1] for k in range(4))
        la = np.hypot((x1 - x0).astype(f), (y1 - y0).astype(f)) + np.hypot((x3 - x2).astype(f), (y3 - y2).astype(f))
        lb = np.hypot((x2 - x1).astype(f), (y2 - y1).astype(f)) + np.hypot((x0 - x3).astype(f), (y0 - y3).astype(f))
        dx = np.where(la >= lb, (x1 + x2) - (x0 + x3), (x2 + x3) - (x0 + x1)).astype(np.float64)
        dy = np.where(la >= lb, (y1 + y2) - (y0 + y3), (y2 + y3) - (y0 + y1)).astype(np.float64)
        rot = np.mod(np.arctan2(dy, dx), np.pi)
        cx, cy, r, a, b = _quads(v, 0.5)
        assert np.array_equal(a, np.maximum(la, lb) * f(0.25)) and np.array_equal(b, np.minimum(la, lb) * f(0.25))
        assert np.array_equal(cx, (x0 + x1 + x2 + x3) * 0.125) and np.array_equal(cy, (y0 + y1 + y2 + y3) * 0.125)
        assert np.allclose(r, rot, rtol=0, atol=1e-12) and np.all((r >= 0) & (r < np.pi))
