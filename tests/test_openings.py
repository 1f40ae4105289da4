"""Complement-tone masks: openings decoded from the written film pieces (metalay.checks.openings).

Designs here are invented test scenarios (slots in a gold film at 1550 nm with the bundled au-slot-1550 library).
"""

import copy
import json
import math
import sys

import numpy as np
import pytest
import shapely
from hypothesis import given
from hypothesis import strategies as st

from metalay.api import compile_design
from metalay.cells.library import load_library
from metalay.checks import openings, optics
from metalay.checks.decode import decode_sites
from metalay.cli import main as cli_main
from metalay.design.lattice import Aperture, Lattice, sample_sites
from metalay.design.spec import parse_design
from metalay.errors import MaskReadError
from metalay.io.gdsread import FlatPolygons, read_mask
from metalay.mask.layout import element_offsets, snap_centres
from metalay.mask.process import (
    ComplementLayout,
    WriteFieldGrid,
    aperture_region_db,
    complement_bands,
    complement_tile,
)

from conftest import write_toml

SLOT_DESIGN = {
    "design": {"name": "t-slots", "wavelength_nm": 1550.0, "input_spin": -1, "library": "au-slot-1550"},
    "phase": [{"kind": "axicon", "half_angle_deg": 2.0}, {"kind": "vortex", "charge": 1}],
    "aperture": {"shape": "circle", "diameter_um": 24.0},
    "lattice": {"kind": "square", "period_nm": 600.0},
    "mask": {"tone": "complement", "bias_nm": -5.0, "formats": ["gds"], "complement_band_rows": 12},
    "checks": {"rules": False, "optics": False},
}

#: Decoding tolerance against the structure decoder reading the same elements written in structures tone: the
#: openings carry the writer's snapped outlines plus cut-line points rounded by at most half a database unit,
#: and the two decoders measure the angle differently (edge directions vs area moments); both stay within the
#: 1 nm snapping limit of about 0.3 deg for a 500 x 180 nm slot (metalay.mask.layout, measured-facts).
ROTATION_TOL_DEG = 0.3
FIGURE_REL_TOL = 1e-3


def _rect(length, width):
    hl, hw = length / 2, width / 2
    return np.array([[hl, hw], [-hl, hw], [-hl, -hw], [hl, -hw]])


# ------------------------------------------------------------------------------------------------------------------
# Area moments against closed forms
# ------------------------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("theta_deg", [0.0, 30.0, 90.0, 135.0])
def test_moments_of_a_rotated_rectangle_match_the_closed_form(theta_deg):
    # Source: Roark's Formulas for Stress and Strain (properties of plane areas): a rectangle L x W has area L W
    # and central second moments A L^2 / 12 and A W^2 / 12 about its axes.
    L, W, c = 500.0, 180.0, np.array([1.234e6, -2.5e6])  # far from the origin: precision must not suffer
    t = math.radians(theta_deg)
    rot = np.array([[math.cos(t), -math.sin(t)], [math.sin(t), math.cos(t)]])
    poly = shapely.Polygon(_rect(L, W) @ rot.T + c)
    m = openings.polygon_moments(np.array([poly], dtype=object))
    assert m.area[0] == pytest.approx(L * W, rel=1e-12)
    cx, cy, r, long, short = openings.moment_sizes(m.area, m.mx, m.my, m.sxx, m.syy, m.sxy)
    assert m.ref_x[0] + cx[0] == pytest.approx(c[0], abs=1e-6) and m.ref_y[0] + cy[0] == pytest.approx(c[1], abs=1e-6)
    assert long[0] == pytest.approx(L, rel=1e-9) and short[0] == pytest.approx(W, rel=1e-9)
    # sign convention: the long axis at +30 deg (counter-clockwise from +x) reads 30, not 150
    assert math.degrees(r[0]) == pytest.approx(theta_deg % 180.0, abs=1e-7)


def test_moments_of_an_ellipse_and_of_a_polygon_with_a_hole():
    # Source: Roark's Formulas for Stress and Strain: ellipse with semi-axes a, b: A = pi a b, I = pi a^3 b / 4
    # about the minor axis; an inscribed n-gon of the ellipse has area (n/2) a b sin(2 pi / n) (affine image of the
    # regular polygon, Euclid's area of a regular polygon).
    a, b, n = 300.0, 120.0, 720
    t = 2 * np.pi * np.arange(n) / n
    ell = shapely.Polygon(np.stack([a * np.cos(t), b * np.sin(t)], axis=1))
    m = openings.polygon_moments(np.array([ell], dtype=object)).shifted(np.zeros(1), np.zeros(1))
    assert m.area[0] == pytest.approx(n / 2 * a * b * math.sin(2 * math.pi / n), rel=1e-12)
    assert m.sxx[0] == pytest.approx(math.pi * a ** 3 * b / 4, rel=1e-4)   # inscribed polygon: O(1/n^2) low
    assert m.syy[0] == pytest.approx(math.pi * a * b ** 3 / 4, rel=1e-4)
    assert abs(m.sxy[0]) < 1e-6 * m.sxx[0]
    ring = shapely.Polygon(_rect(1000, 800), [_rect(400, 200)[::-1]])
    mr = openings.polygon_moments(np.array([ring], dtype=object)).shifted(np.zeros(1), np.zeros(1))
    assert mr.area[0] == pytest.approx(1000 * 800 - 400 * 200)
    assert mr.sxx[0] == pytest.approx((1000 ** 3 * 800 - 400 ** 3 * 200) / 12)


# ------------------------------------------------------------------------------------------------------------------
# Decoding a tone inversion written by the process stage
# ------------------------------------------------------------------------------------------------------------------

def _pieces_and_layout(aperture, lattice, theta, *, rows, field=None):
    sites = sample_sites(aperture, lattice)
    centres = snap_centres(sites.x_um, sites.y_um, 1.0)
    offsets = element_offsets(_rect(500, 180), theta, 1.0)
    region = aperture_region_db(aperture, db_unit_nm=1.0)
    bands = complement_bands(region, lattice, aperture, db_unit_nm=1.0, reach_nm=280, rows_per_band=rows,
                             field=field)
    layout = ComplementLayout(region, tuple(bands), field, 0)
    starts, xys = [], []
    for band in bands:
        cuts = layout.field_cuts_db(band.box_db[0], band.box_db[2])
        tile = complement_tile(centres, offsets, region, band.box_db, cut_x_db=cuts, verify=False)
        counts = np.diff(tile.start)
        starts.append(counts)
        xys.append(tile.xy_db)
    counts = np.concatenate(starts)
    flat = FlatPolygons.from_arrays(1, 0, counts, np.concatenate(xys))
    return sites, offsets, flat, layout


class _Slot:
    id, kind = "slot-500x180", "slot"

    @staticmethod
    def dim(name):
        return {"length_nm": 500.0, "width_nm": 180.0}[name]


@given(seed=st.integers(0, 2 ** 31 - 1), kind=st.sampled_from(["square", "hexagonal"]),
       rows=st.integers(2, 6), field=st.booleans())
def test_openings_read_back_the_written_elements(seed, kind, rows, field):
    # Property (read-back equals what was written): every element becomes one opening at its own site, with its
    # rotation recovered within the snapping limit, for square and hexagonal lattices, several band heights and
    # write-field cut lines.
    aperture = Aperture("circle", diameter_um=5.0)
    lattice = Lattice(kind, 600.0)
    n = len(sample_sites(aperture, lattice))
    theta = np.random.default_rng(seed).uniform(0, np.pi, n)
    grid = WriteFieldGrid.from_um(1.9, (0.31, -0.2), db_unit_nm=1.0) if field else None
    sites, offsets, flat, layout = _pieces_and_layout(aperture, lattice, theta, rows=rows, field=grid)
    dec = openings.decode_openings(flat, [_Slot], layout, period_nm=600.0, lattice=kind)
    order = np.lexsort((sites.i, sites.j))
    assert np.array_equal(dec.i, sites.i[order]) and np.array_equal(dec.j, sites.j[order])
    from metalay.mask.layout import recovered_rotation

    written = recovered_rotation(offsets)[order]
    d = np.degrees(np.angle(np.exp(2j * (dec.rotation_rad - written)))) / 2
    assert np.max(np.abs(d)) < ROTATION_TOL_DEG
    assert dec.stats["unmatched"] == 0 and dec.stats["max_size_error_nm"] < 2.0


def test_a_missing_piece_is_an_unmatched_opening():
    # the check can fail: remove one written piece and the film there becomes one large opening
    aperture = Aperture("circle", diameter_um=5.0)
    lattice = Lattice("square", 600.0)
    theta = np.zeros(len(sample_sites(aperture, lattice)))
    _, _, flat, layout = _pieces_and_layout(aperture, lattice, theta, rows=3)
    keep = np.ones(flat.count, bool)
    keep[flat.count // 2] = False
    with pytest.raises(MaskReadError, match="openings match no library cell"):
        openings.decode_openings(flat.select(keep), [_Slot], layout, period_nm=600.0, where="m.gds")
    with pytest.raises(MaskReadError, match="no film pieces"):
        openings.decode_openings(flat.select(np.zeros(flat.count, bool)), [_Slot], layout, period_nm=600.0)


def test_decoding_is_banded_and_does_not_loop_over_sites(monkeypatch):
    # Memory is bounded by one band: every band is decoded from only the pieces that overlap it, and the number
    # of Python-level calls depends on the number of bands and strip chunks, not on the sites: with the same
    # number of bands, 9x the sites costs (almost) no more calls, far below one call per added site.
    def run(diameter_um, rows):
        aperture = Aperture("circle", diameter_um=diameter_um)
        lattice = Lattice("square", 600.0)
        theta = np.linspace(0, np.pi, len(sample_sites(aperture, lattice)))
        _, _, flat, layout = _pieces_and_layout(aperture, lattice, theta, rows=rows)
        calls = {"n": 0}

        def count(frame, event, arg):
            if event in ("call", "c_call"):
                calls["n"] += 1

        sys.setprofile(count)
        try:
            dec = openings.decode_openings(flat, [_Slot], layout, period_nm=600.0)
        finally:
            sys.setprofile(None)
        return len(dec), calls["n"], layout

    n1, c1, lay1 = run(12.0, 8)
    n2, c2, lay2 = run(36.0, 24)
    assert len(lay1.bands) == len(lay2.bands) and n2 > 8 * n1
    assert c2 < 1.2 * c1 and c2 - c1 < 0.05 * (n2 - n1)

    seen = []
    real = openings._band_openings

    def spy(pieces, bounds, box_db, *a, **k):
        inside = (bounds[:, 3] > box_db[1]) & (bounds[:, 1] < box_db[3])
        seen.append((len(pieces), bool(inside.all())))
        return real(pieces, bounds, box_db, *a, **k)

    monkeypatch.setattr(openings, "_band_openings", spy)
    aperture = Aperture("circle", diameter_um=12.0)
    lattice = Lattice("square", 600.0)
    theta = np.zeros(len(sample_sites(aperture, lattice)))
    _, _, flat, layout = _pieces_and_layout(aperture, lattice, theta, rows=4)
    openings.decode_openings(flat, [_Slot], layout, period_nm=600.0)
    assert len(seen) == len(layout.bands) > 3
    assert all(ok for _, ok in seen) and max(n for n, _ in seen) < flat.count / 2


# ------------------------------------------------------------------------------------------------------------------
# Compiled masks: complement tone judged like structures tone
# ------------------------------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def slot_pair(tmp_path_factory):
    root = tmp_path_factory.mktemp("slots")
    # one folder of solved biased cells for every check of this file, and a truncation of 10 orders per axis for
    # the biased solve: the gold slots' recorded truncation costs about 75 s per check here, and what these tests
    # compare is the two tones (both checks use the same biased responses), not the solver's convergence, which
    # tests/test_biascells.py and tests/test_rcwa.py check against grcwa and closed forms
    out = {"cell_cache": str(root / "cell-cache")}
    for tone in ("complement", "structures"):
        raw = copy.deepcopy(SLOT_DESIGN)
        raw["design"]["name"] = f"t-slots-{tone}"
        raw["mask"]["tone"] = tone
        raw["checks"].update(cell_cache=out["cell_cache"], bias_harmonics=10)
        # write fields in both tones: the field boundaries are extra cut lines of the tone inversion, and the
        # elements moved off their columns at field edges test the merging of touching pieces
        raw["mask"]["write_field"] = {"size_um": 7.0, "origin_um": [0.13, 0.0]}
        path = write_toml(root / f"{tone}.toml", raw)
        design = parse_design(raw, where=str(path))
        res = compile_design(design, root / tone, show_progress=False, run_rules=False, run_optics=False)
        out[tone] = (design, res.files["gds"], path)
    return out


def test_complement_and_structures_tone_give_the_same_optics(slot_pair):
    lib = load_library("au-slot-1550")
    (dc, mc, _), (ds, ms, _) = slot_pair["complement"], slot_pair["structures"]
    # the same elements decoded from both masks
    a = openings.decode_written(read_mask(mc), lib.cells, dc, period_nm=600.0, lattice="square", layer=(1, 0),
                                bias_nm=-5.0, where=str(mc))
    b = decode_sites(read_mask(ms), lib.cells, period_nm=600.0, bias_nm=-5.0)
    assert a.stats["tone"] == "complement" and a.stats["pieces"] > 0 and a.stats["unmatched"] == 0
    assert np.array_equal(a.i, b.i) and np.array_equal(a.j, b.j) and np.array_equal(a.cell, b.cell)
    d = np.degrees(np.angle(np.exp(2j * (a.rotation_rad - b.rotation_rad)))) / 2
    assert np.max(np.abs(d)) < ROTATION_TOL_DEG
    assert np.max(np.hypot(a.x_um - b.x_um, a.y_um - b.y_um)) < 1e-3  # within 1 nm
    opts = optics.OpticsOptions(make_plots=False, max_side=1024)
    fa = optics.check_optics(mc, lib, design=dc, options=opts).figures
    fb = optics.check_optics(ms, lib, design=ds, options=opts).figures
    for key in ("converted", "leakage", "designed_polarization"):
        assert fa["power_budget"][key] == pytest.approx(fb["power_budget"][key], rel=FIGURE_REL_TOL)
    assert fa["designed_spot_efficiency"] == pytest.approx(fb["designed_spot_efficiency"], rel=FIGURE_REL_TOL)
    assert fa["oam"]["purity"] == pytest.approx(fb["oam"]["purity"], rel=FIGURE_REL_TOL)
    assert fa["fringe_reading"]["charge"] == fb["fringe_reading"]["charge"] == 1
    assert fa["decode"]["tone"] == "complement"


def test_cli_optics_and_compile_judge_complement_masks(slot_pair, tmp_path, capsys):
    design, mask, path = slot_pair["complement"]
    rc = cli_main(["optics", str(mask), "--design", str(path), "-o", str(tmp_path / "o"), "--no-plots", "--quiet"])
    assert rc == 0
    fig = json.loads((tmp_path / "o" / "optics.json").read_text())
    assert fig["decode"]["tone"] == "complement" and fig["decode"]["sites"] > 1000
    # without the design the tone is unknown: the pieces do not decode as elements (one clear line)
    rc = cli_main(["optics", str(mask), "--library", "au-slot-1550", "-o", str(tmp_path / "o2"), "--quiet"])
    err = capsys.readouterr().err
    assert rc != 0 and err.count("\n") == 1 and "complement-tone mask holds film pieces" in err
    raw = copy.deepcopy(SLOT_DESIGN)
    raw["checks"].update(optics=True, cell_cache=slot_pair["cell_cache"], bias_harmonics=10)
    res = compile_design(parse_design(raw, where=str(tmp_path / "c.toml")), tmp_path / "c", show_progress=False,
                         run_rules=False)
    check = res.manifest["checks"]["optics"]
    assert check["figures"]["decode"]["tone"] == "complement"
    assert check["figures"]["oam"]["purity"] > 0.9
