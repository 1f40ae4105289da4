"""Lattice sampling inside apertures."""

import numpy as np
import pytest
import shapely
from hypothesis import given
from hypothesis import strategies as st
from scipy.spatial import cKDTree

from metalay.design.lattice import (
    Aperture,
    Lattice,
    aperture_area_um2,
    cell_area_um2,
    cell_vertices_um,
    row_range,
    sample_sites,
    site_count,
)


def test_square_aperture_exact_count():
    # Common practice (no source): a W x W square holding whole p x p cells centred on i*p has
    # (2*floor((W/p - 1)/2) + 1)^2 cells when a site sits at the centre.
    p_nm = 500.0
    for w_um in (5.0, 5.4, 6.0, 10.25):
        n1 = 2 * int(np.floor((w_um / (p_nm * 1e-3) - 1) / 2)) + 1
        sites = sample_sites(Aperture("square", width_um=w_um), Lattice("square", p_nm))
        assert len(sites) == n1 * n1


@pytest.mark.parametrize("kind", ["square", "hexagonal"])
@pytest.mark.parametrize("shape", ["circle", "annulus", "rectangle"])
def test_whole_cells_inside_and_maximal(kind, shape):
    # Independent check with shapely: every kept cell lies inside the aperture; every rejected candidate does not.
    lat = Lattice(kind, 700.0)
    ap = {"circle": Aperture("circle", diameter_um=12.0),
          "annulus": Aperture("annulus", diameter_um=12.0, inner_diameter_um=4.0),
          "rectangle": Aperture("rectangle", width_um=9.0, height_um=5.0)}[shape]
    if shape == "rectangle":
        region = shapely.box(-4.5, -2.5, 4.5, 2.5)
    else:
        region = shapely.Point(0, 0).buffer(6.0, quad_segs=512)
        if shape == "annulus":
            region = region.difference(shapely.Point(0, 0).buffer(2.0, quad_segs=512))
    sites = sample_sites(ap, lat)
    verts = cell_vertices_um(lat)
    cells = shapely.polygons(verts[None, :, :] + np.stack([sites.x_um, sites.y_um], 1)[:, None, :])
    outer = shapely.buffer(region, 1e-6)
    assert np.all(shapely.within(cells, outer))
    # nearest-neighbour distance equals the period
    d, _ = cKDTree(np.stack([sites.x_um, sites.y_um], 1)).query(np.stack([sites.x_um, sites.y_um], 1), k=2)
    assert d[:, 1].min() == pytest.approx(0.7, rel=1e-12)
    if shape != "annulus":  # for squares the rule is exact both ways: rejected cells cross the boundary
        j0, j1 = row_range(ap, lat)
        p = lat.period_um
        jj = np.arange(j0, j1)
        ii = np.arange(-40, 41)
        I, J = np.meshgrid(ii, jj)
        shift = (J % 2) * 0.5 if kind == "hexagonal" else 0 * J
        x = ((I + shift) * p).ravel()
        y = (J * lat.row_pitch_um).ravel()
        allc = shapely.polygons(verts[None] + np.stack([x, y], 1)[:, None, :])
        inside = shapely.within(allc, shapely.buffer(region, 1e-9))
        if shape == "rectangle" or kind == "square":
            assert inside.sum() == len(sites)


def test_fill_factor_approaches_one():
    # Gauss circle problem: the count of whole cells approaches area/cell_area with an O(perimeter) deficit.
    lat = Lattice("square", 325.0)
    ap = Aperture("circle", diameter_um=300.0)
    n = len(sample_sites(ap, lat))
    ratio = n * cell_area_um2(lat) / aperture_area_um2(ap)
    perimeter_cells = np.pi * 300.0 / 0.325
    assert 1 - 2 * perimeter_cells / (n) < ratio <= 1.0


def test_tiles_equal_whole():
    ap = Aperture("circle", diameter_um=40.0)
    lat = Lattice("hexagonal", 400.0)
    whole = sample_sites(ap, lat)
    j0, j1 = row_range(ap, lat)
    parts = [sample_sites(ap, lat, rows=(a, min(a + 7, j1))) for a in range(j0, j1, 7)]
    assert np.array_equal(np.concatenate([s.x_um for s in parts]), whole.x_um)
    assert site_count(ap, lat, rows_per_tile=5) == len(whole)


@given(d=st.floats(2.0, 30.0), p=st.floats(150.0, 900.0))
def test_every_site_inside_circle(d, p):
    ap = Aperture("circle", diameter_um=d)
    lat = Lattice("square", p)
    s = sample_sites(ap, lat)
    if len(s):
        corner = np.hypot(np.abs(s.x_um) + p * 5e-4, np.abs(s.y_um) + p * 5e-4)
        assert corner.max() <= d / 2 * (1 + 1e-9)
