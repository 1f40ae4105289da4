"""Fabrication routes: multi-level etch masks, fork gratings, SLM images, orientation maps, comparison."""

import io
import math

import numpy as np
import pytest
import shapely

from metalay.design.spec import parse_design
from metalay.errors import DesignError
from metalay.io.gdsread import read_mask
from metalay.io.writer import MAX_GDS_VERTICES
from metalay.routes import _routes_geom as geo
from metalay.routes import routes as R


def make_design(phase, routes=None, *, diameter_um=60.0, name="t-routes", sigma=1, where="<memory>"):
    data = {
        "design": {"name": name, "wavelength_nm": 633.0, "input_spin": sigma, "library": "tio2-nanofin-532"},
        "phase": phase,
        "aperture": {"shape": "circle", "diameter_um": diameter_um},
        "lattice": {"kind": "square", "period_nm": 400.0},
    }
    if routes is not None:
        data["routes"] = routes
    return parse_design(data, where=where)


VORTEX1 = [{"kind": "vortex", "charge": 1}]


# ------------------------------------------------------------------------------------------------ formulas
def test_etch_depths_and_spiral_step_height():
    # Source: Swanson 1989, MIT Lincoln Laboratory TR 854: mask j is etched to lambda / (2^j (n - 1)).
    lam, n = 633.0, 1.457
    d = R.etch_depths_nm(8, lam, n)
    assert d.shape == (3,)
    np.testing.assert_allclose(d, [633 / (2 * 0.457), 633 / (4 * 0.457), 633 / (8 * 0.457)], rtol=1e-12)
    assert d[0] == pytest.approx(692.5602, abs=1e-3)
    # the masks together reach (N - 1) steps of lambda / (N (n - 1))
    assert d.sum() == pytest.approx(7 * R.level_step_nm(8, lam, n), rel=1e-12)
    # Source: Beijersbergen et al. 1994, Opt. Commun. 112, 321: spiral phase plate step height l lambda/(n-1).
    assert R.spiral_step_height_nm(1, lam, n) == pytest.approx(1385.1204, abs=1e-3)
    assert R.spiral_step_height_nm(-3, lam, n) == pytest.approx(3 * 633 / 0.457, rel=1e-12)


def test_multilevel_efficiency_values():
    # Source: Swanson 1989, MIT Lincoln Laboratory TR 854: eta = sinc^2(1/N): 40.5 %, 81.1 %, 95.0 %, 98.7 %.
    expected = {2: 0.4053, 4: 0.8106, 8: 0.9496, 16: 0.9872}
    for n, eta in expected.items():
        assert R.multilevel_efficiency(n) == pytest.approx(eta, abs=1e-4)
    assert R.multilevel_efficiency(2) == pytest.approx(4 / math.pi ** 2, rel=1e-12)


@pytest.mark.parametrize("levels", [2, 4, 8])
def test_etched_plate_field_gives_sinc2_efficiency(levels):
    # Source: Swanson 1989, MIT Lincoln Laboratory TR 854 (first-order efficiency sinc^2(1/N)); the field is
    # built from the etch depths and the index (exp(i 2 pi (n - 1) h / lambda)), so a wrong depth or sign fails.
    d = make_design(VORTEX1, {"etch": {"levels": levels, "index": 1.457}, "compare_samples": 384})
    (row,) = R.compare_routes(d, routes=("etch",))
    assert row.efficiency == pytest.approx(R.multilevel_efficiency(levels), abs=0.01)
    # pure vortex: the quantisation orders have charges 1 + mN, so the purity of charge 1 is sinc^2(1/N) too
    assert row.purity == pytest.approx(R.multilevel_efficiency(levels), abs=0.02)


@pytest.mark.parametrize("levels", [2, 4, 16])
def test_binary_mask_depths_make_every_level(levels):
    # Source: Swanson 1989, MIT Lincoln Laboratory TR 854: k masks of depths lambda/(2^j (n-1)) combine into
    # N = 2^k equal steps; here the relief D - e must imprint 2 pi q / N on level q.
    lam, n = 633.0, 1.457
    q = np.arange(levels)
    phi = 2 * np.pi * (q + 0.5) / levels + 2 * np.pi * np.array([[-3], [0], [5]])  # level centres, other turns
    e = R.etched_depth_nm(phi, levels, lam, n)
    relief_phase = 2 * np.pi * (n - 1) * (R.etch_depths_nm(levels, lam, n).sum() - e) / lam
    np.testing.assert_allclose(np.angle(np.exp(1j * (relief_phase - 2 * np.pi * q / levels))), 0, atol=1e-9)
    assert len(np.unique(np.round(e[1], 6))) == levels  # every level has its own depth


# ------------------------------------------------------------------------------------------------ level regions
def test_level_region_areas_pure_vortex():
    # Common practice (no source): every level of a pure vortex plate covers 1/N of the aperture (equal wedges).
    d = make_design([{"kind": "vortex", "charge": 2}], {"etch": {"levels": 4, "index": 1.457}, "raster_um": 0.25})
    regions, err = R.level_regions(d)
    ap, ap_err = geo.aperture_geometry(d.aperture, tolerance_um=5e-4)
    cores, charges = R._cores(d.terms)
    core_r = float(R._core_radii(charges, 2, 0.25).max())
    assert err < 0.01  # vertices refined onto the exact level set; straight wedge edges
    for reg in regions:
        perimeter = reg.boundary.length
        tol = perimeter * err + math.pi * core_r ** 2 / 4 + perimeter * ap_err
        assert abs(reg.area - ap.area / 4) <= tol, (reg.area, ap.area / 4, tol)
        assert abs(reg.area - ap.area / 4) / ap.area < 2e-3
    # the levels tile the aperture
    assert abs(shapely.union_all(regions).area - ap.area) <= math.pi * core_r ** 2


def test_etch_masks_written_gds(tmp_path):
    d = make_design([{"kind": "vortex", "charge": 2}], {"etch": {"levels": 8, "index": 1.457, "layer": 30},
                                                       "raster_um": 0.25})
    e = R.etch_masks(d)
    paths = R.write_etch(e, tmp_path / "a", d.name)
    paths2 = R.write_etch(R.etch_masks(d), tmp_path / "b", d.name)
    assert [p.read_bytes() for p in paths] == [p.read_bytes() for p in paths2]  # deterministic bytes
    flat = read_mask(paths[0])
    assert sorted(set(flat.layer.tolist())) == [30, 31, 32]
    nv = np.diff(flat.start)
    assert nv.max() <= MAX_GDS_VERTICES and nv.min() >= 3
    ap_area = e.aperture_area_um2
    for j, layer in enumerate([30, 31, 32]):
        polys = [shapely.Polygon(flat.xy_db[flat.start[k]:flat.start[k + 1]] * 1e-3)
                 for k in np.flatnonzero(flat.layer == layer)]
        assert all(p.is_valid for p in polys)
        area = sum(p.area for p in polys)
        # each bit-plane of a pure vortex covers half the aperture; the pieces do not overlap
        assert area == pytest.approx(ap_area / 2, rel=2e-3)
        assert shapely.union_all(polys).area == pytest.approx(area, rel=1e-9)
        assert e.mask_area_um2[j] == pytest.approx(area, rel=1e-9)


def test_etch_split_into_files(tmp_path):
    d = make_design(VORTEX1, {"etch": {"levels": 4, "index": 1.457}, "raster_um": 0.5}, diameter_um=30.0)
    paths = R.write_etch(R.etch_masks(d), tmp_path, d.name, split="files")
    assert [p.name for p in paths] == ["t-routes_etch_mask1.gds", "t-routes_etch_mask2.gds", "t-routes_etch.json"]


def test_gds_pieces_cut_lines_remove_holes_and_limit_vertices():
    # Source: Calma 1987, GDSII Stream Format Manual 6.0: boundaries have no holes and <= 8191 XY points.
    outer = shapely.box(0, 0, 100, 100)
    holed = outer.difference(shapely.box(10, 10, 20, 20)).difference(shapely.Point(60, 60).buffer(10))
    ang = np.linspace(0, 2 * np.pi, 20000, endpoint=False)
    big = shapely.Polygon(np.stack([200 + 50 * np.cos(ang), 50 * np.sin(ang)], axis=1))
    geom = shapely.MultiPolygon([holed, big])
    pieces = geo.gds_pieces(geom, max_vertices=MAX_GDS_VERTICES)
    assert all(len(p.interiors) == 0 for p in pieces)
    assert all(geo.count_vertices(p) <= MAX_GDS_VERTICES for p in pieces)
    union = shapely.union_all(pieces)
    assert union.symmetric_difference(geom).area < 1e-9 * geom.area
    assert sum(p.area for p in pieces) == pytest.approx(geom.area, rel=1e-12)


# ------------------------------------------------------------------------------------------------ fork grating
def _count_crossings(polys, y_um, x_half_um):
    line = shapely.LineString([(-x_half_um, y_um), (x_half_um, y_um)])
    hit = shapely.union_all(polys).intersection(line)
    return len([g for g in shapely.get_parts(hit) if g.length > 0])


@pytest.mark.parametrize("charge,azimuth", [(1, 180.0), (3, 180.0), (-2, 180.0), (2, 0.0)])
def test_fork_extra_lines_equal_charge(tmp_path, charge, azimuth):
    # Common practice (no source): lines crossing a line above the dislocation minus below equals l
    # (carrier towards -x, i.e. the charge-l beam in the +1 order deflected to -x; the sign flips for +x).
    d = make_design([{"kind": "vortex", "charge": charge}],
                    {"fork": {"period_um": 4.0, "azimuth_deg": azimuth}, "raster_um": 0.25}, diameter_um=60.0)
    f = R.fork_grating(d)
    (path, _) = R.write_fork(f, tmp_path, d.name)
    flat = read_mask(path)
    assert set(flat.layer.tolist()) == {20}
    polys = [shapely.Polygon(flat.xy_db[flat.start[k]:flat.start[k + 1]] * 1e-3) for k in range(len(flat.layer))]
    # endpoints at x = +-26 um = +-6.5 periods: on a line or gap centre (carrier phase 13 pi, plus l pi on the
    # left), never near a line edge; y = +-2 um keeps the vortex phase at the ends within 3 * 0.08 rad of that
    x_half = 26.0
    above = _count_crossings(polys, 2.0, x_half)
    below = _count_crossings(polys, -2.0, x_half)
    sign = 1 if azimuth == 180.0 else -1
    assert above - below == sign * charge, (above, below)
    assert f.charge == charge


def test_fork_rules_and_efficiency():
    d = make_design([{"kind": "vortex", "charge": 2}], {"fork": {"period_um": 6.0, "min_line_um": 1.0,
                                                                  "min_gap_um": 1.0}, "raster_um": 0.25,
                                                         "compare_samples": 512})
    f = R.fork_grating(d)
    assert f.rules["nominal_ok"]
    assert f.rules["narrow_lines"]["near_core"] >= 1  # the tines of the fork end in points
    assert f.line_area_um2 / f.aperture_area_um2 == pytest.approx(0.5, abs=0.01)
    # Source: Goodman 2005, Introduction to Fourier Optics, sec. 4.4: binary amplitude grating, 50 % duty,
    # first order |c_1|^2 = 1/pi^2; 0/pi binary phase grating 4/pi^2.
    (row,) = R.compare_routes(d, routes=("fork",))
    assert row.efficiency == pytest.approx(1 / math.pi ** 2, abs=0.004)
    assert row.far_field == pytest.approx(1 / math.pi ** 2, abs=0.01)
    assert row.purity > 0.97
    d2 = make_design([{"kind": "vortex", "charge": 2}], {"fork": {"period_um": 6.0, "kind": "phase", "index": 1.457},
                                                          "raster_um": 0.25, "compare_samples": 512})
    (row2,) = R.compare_routes(d2, routes=("fork",))
    assert row2.efficiency == pytest.approx(4 / math.pi ** 2, abs=0.015)
    f2 = R.fork_grating(d2)
    assert f2.etch_depth_nm == pytest.approx(633 / (2 * 0.457), rel=1e-12)
    narrow = make_design(VORTEX1, {"fork": {"period_um": 1.5, "min_line_um": 1.0}, "raster_um": 0.25},
                         diameter_um=20.0)
    assert not R.fork_grating(narrow).rules["nominal_ok"]
    coarse = make_design(VORTEX1, {"fork": {"period_um": 0.8}, "raster_um": 0.25}, diameter_um=20.0)
    with pytest.raises(DesignError, match=r"routes\.fork\.period_um"):
        R.fork_grating(coarse)


# ------------------------------------------------------------------------------------------------ SLM image
@pytest.mark.parametrize("bits", [8, 16])
def test_slm_png_round_trip(tmp_path, bits):
    from PIL import Image

    d = make_design([{"kind": "vortex", "charge": 3}, {"kind": "lens", "focal_length_um": 20000.0}],
                    {"slm": {"pitch_um": 0.5, "width_px": 160, "height_px": 120, "bit_depth": bits,
                             "carrier_period_px": 8.0, "carrier_azimuth_deg": 30.0}})
    im = R.slm_image(d)
    paths = R.write_slm(im, tmp_path, d.name)
    data = paths[0].read_bytes()
    assert b"tIME" not in data and b"tEXt" not in data
    assert R.write_slm(R.slm_image(d), tmp_path / "again", d.name)[0].read_bytes() == data
    # Pillow, a general-purpose image library, reads the file back
    gray = np.array(Image.open(io.BytesIO(data))).astype(np.int64)
    assert gray.shape == (120, 160)
    phase = R.gray_to_phase(gray, bits)
    # independent target: design phase + carrier at the documented pixel centres
    x = (np.arange(160) - 79.5) * 0.5
    y = (59.5 - np.arange(120)) * 0.5
    xx, yy = np.meshgrid(x, y)
    a = math.radians(30.0)
    target = (3 * np.arctan2(yy, xx) - 2 * np.pi / 0.633 * (np.sqrt(xx ** 2 + yy ** 2 + 20000.0 ** 2) - 20000.0)
              + 2 * np.pi * (xx * math.cos(a) + yy * math.sin(a)) / (8 * 0.5))
    inside = xx ** 2 + yy ** 2 <= 30.0 ** 2
    err = np.abs(np.angle(np.exp(1j * (phase - target))))[inside]
    assert err.max() <= 2 * np.pi / 2 ** bits * (1 + 1e-6)  # within one gray level
    assert np.all(gray[~inside] == 0)


def test_slm_lookup_table(tmp_path):
    # invented device response (demo data): phase = 2.3 pi (g / 255)^1.2 measured every 15 gray levels
    g = np.arange(0, 256, 15)
    p = 2.3 * np.pi * (g / 255.0) ** 1.2
    lut = tmp_path / "lut.csv"
    lut.write_text("gray,phase_rad\n" + "".join(f"{int(a)},{float(b)!r}\n" for a, b in zip(g, p)))
    d = make_design(VORTEX1, {"slm": {"pitch_um": 0.5, "width_px": 100, "height_px": 100, "lut": str(lut)}},
                    diameter_um=40.0)
    im = R.slm_image(d)
    table = np.interp(np.arange(256), g, p)
    shown = table[im.gray.astype(int)]
    err = np.abs(np.angle(np.exp(1j * (shown - im.target_rad))))[im.inside]
    assert err.max() <= np.max(np.diff(table)) / 2 + 1e-9
    bad = tmp_path / "bad.csv"
    bad.write_text("gray,phase_rad\n0,1.0\n10,0.5\n")
    d_bad = make_design(VORTEX1, {"slm": {"lut": str(bad)}}, diameter_um=40.0)
    with pytest.raises(DesignError, match="routes.slm.lut"):
        R.slm_image(d_bad)


# ------------------------------------------------------------------------------------------------ orientation
def test_orientation_map_png_and_csv(tmp_path):
    from PIL import Image

    d = make_design([{"kind": "qplate", "q": 0.5}], {"orient": {"pitch_um": 1.0}}, diameter_um=40.0, sigma=-1)
    om = R.orientation_map(d)
    png, csv_path, _ = R.write_orientation(om, tmp_path, d.name)
    code = np.array(Image.open(png)).astype(np.int64)
    theta = code * np.pi / 65536
    deg = np.loadtxt(csv_path, delimiter=",")
    assert deg.shape == code.shape == (40, 40)
    inside = om.inside
    # Source: Marrucci, Manzo & Paparo 2006, PRL 96, 163905: a q-plate's axis is q * azimuth + alpha0.
    xx, yy = np.meshgrid(om.x_um, om.y_um)
    expected = np.mod(0.5 * np.arctan2(yy, xx), np.pi)
    diff = np.abs(np.angle(np.exp(2j * (theta - expected))))[inside] / 2
    assert diff.max() <= np.pi / 65536
    np.testing.assert_allclose(deg[inside], np.degrees(theta[inside]), atol=1e-4)
    assert np.all(np.isnan(deg[~inside]))


# ------------------------------------------------------------------------------------------------ validation, CLI
@pytest.mark.parametrize("routes,key", [
    ({"etch": {"levels": 6}}, "routes.etch.levels"),
    ({"etch": {"depth": 1}}, "routes.etch.depth"),
    ({"slm": {"bit_depth": 12}}, "routes.slm.bit_depth"),
    ({"fork": {"duty": 1.5}}, "routes.fork.duty"),
    ({"bogus": 1}, "routes.bogus"),
    ({"orient": {"pitch_um": 0.0}}, "routes.orient.pitch_um"),
])
def test_bad_route_keys(routes, key):
    d = make_design(VORTEX1, routes, where="d.toml")
    with pytest.raises(DesignError, match=key.replace(".", r"\.")) as exc:
        R.parse_routes(d)
    assert "d.toml" in str(exc.value) and "\n" not in str(exc.value)


def test_cli_routes(tmp_path, capsys):
    from metalay.cli import main

    text = ('[design]\nname = "cli-r"\nwavelength_nm = 633.0\ninput_spin = 1\nlibrary = "tio2-nanofin-532"\n'
            '[[phase]]\nkind = "vortex"\ncharge = 2\n[aperture]\nshape = "circle"\ndiameter_um = 30.0\n'
            '[lattice]\nkind = "square"\nperiod_nm = 400.0\n'
            '[routes]\nraster_um = 0.25\ncompare_samples = 128\n[routes.etch]\nlevels = 4\nindex = 1.457\n'
            '[routes.fork]\nperiod_um = 3.0\n[routes.slm]\npitch_um = 0.5\nwidth_px = 64\nheight_px = 64\n'
            '[routes.orient]\npitch_um = 1.0\n')
    design = tmp_path / "d.toml"
    design.write_text(text)
    out = tmp_path / "out"
    assert main(["routes", "all", str(design), "-o", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "sinc^2(1/4) = 0.8106" in printed and "compare" in printed
    names = sorted(p.name for p in out.iterdir())
    assert "cli-r_etch.gds" in names and "cli-r_fork.gds" in names and "cli-r_slm.png" in names
    assert "cli-r_orient.csv" in names and not any(n.endswith(".part") for n in names)
    bad = tmp_path / "bad.toml"
    bad.write_text(text.replace("levels = 4", "levels = 3"))
    assert main(["routes", "etch", str(bad), "-o", str(tmp_path / "o2")]) == 2
    err = capsys.readouterr().err
    assert "routes.etch.levels" in err and err.count("\n") == 1
    assert not (tmp_path / "o2").exists() or not any((tmp_path / "o2").iterdir())


def test_material_index_from_materials_module():
    materials = pytest.importorskip("metalay.cells.materials")
    # Source: Malitson 1965, J. Opt. Soc. Am. 55, 1205: fused silica n = 1.4570 at 633 nm
    n = R.substrate_index("fused_silica", 633.0)
    assert n == pytest.approx(1.4570, abs=2e-3)
    assert materials is not None
