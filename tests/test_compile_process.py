"""Process settings wired through compile: bias, tone, write fields, marks, dose datatypes (read back from files)."""

import copy
from dataclasses import replace

import gdstk
import numpy as np
import pytest
import shapely

from metalay.api import compile_design
from metalay.cells.library import load_library, save_library
from metalay.design.lattice import Aperture
from metalay.design.spec import load_design
from metalay.io.gdsread import read_mask
from metalay.mask.process import WriteFieldGrid, aperture_region_db, straddles_write_field

from conftest import SMALL_DESIGN, write_toml


def _compile(tmp_path, data, name):
    design = load_design(write_toml(tmp_path / f"{name}.toml", data))
    return compile_design(design, tmp_path / name, show_progress=False)


def _polys(path, layer, datatype=None):
    flat = read_mask(path)
    keep = (flat.layer == layer) & ((flat.datatype == datatype) if datatype is not None else True)
    idx = np.flatnonzero(keep)
    return [flat.xy_db[flat.start[k]:flat.start[k + 1]] for k in idx], flat.datatype[idx]


def test_bias_area_closed_form(tmp_path):
    # Source: closed form of a parallel offset with square (mitred) corners: (L + 2b)(W + 2b)
    d = copy.deepcopy(SMALL_DESIGN)
    d["mask"].update({"bias_nm": 10.0, "formats": ["gds"]})
    res = _compile(tmp_path, d, "b")
    cell = load_library("tio2-nanofin-532").cells[0]
    L, W = cell.dim("length_nm") + 20.0, cell.dim("width_nm") + 20.0
    polys, _ = _polys(res.files["gds"], 1, 0)
    areas = shapely.area(shapely.polygons([p.astype(float) for p in polys]))
    # snapping moves each vertex by <= 0.5 nm per axis: area changes by at most ~ perimeter * 0.71 nm
    # Common practice (no source)
    tol = 2 * (L + W) * 0.71
    assert np.abs(areas - L * W).max() <= tol
    assert abs(areas.mean() - L * W) < 40
    assert res.manifest["process"]["bias_nm"] == 10.0


def test_complement_plus_structures_is_aperture(tmp_path):
    d = copy.deepcopy(SMALL_DESIGN)
    d["aperture"] = {"shape": "circle", "diameter_um": 8.0}
    d["mask"].update({"formats": ["gds", "oas"], "label": False})
    s = _compile(tmp_path, d, "s")
    d2 = copy.deepcopy(d)
    d2["mask"].update({"tone": "complement", "complement_band_rows": 8})
    c = _compile(tmp_path, d2, "c")
    fins, _ = _polys(s.files["gds"], 1, 0)
    comp, _ = _polys(c.files["gds"], 1, 0)
    a_fins = shapely.area(shapely.polygons([p.astype(float) for p in fins])).sum()
    comp_polys = [shapely.Polygon(p.astype(float)) for p in comp]
    a_comp = sum(p.area for p in comp_polys)
    region = aperture_region_db(Aperture("circle", diameter_um=8.0), db_unit_nm=1.0)
    # Source: GDSII Stream Format Manual Release 6.0 (Calma 1987): at most 8191 XY points per boundary
    assert max(len(p) for p in comp) <= 8190
    assert all(p.is_valid for p in comp_polys)
    # Common practice (no source): vertices move by <= half a grid unit, so the areas agree within
    # (sqrt(2)/2) * (total perimeter) in nm^2
    perimeter = sum(p.length for p in comp_polys)
    assert abs(a_fins + a_comp - region.area) <= 0.71 * perimeter
    union = shapely.union_all(comp_polys + [shapely.Polygon(p.astype(float)) for p in fins])
    assert union.symmetric_difference(region).area <= 0.71 * perimeter
    # pieces do not overlap each other
    assert shapely.union_all(comp_polys).area == pytest.approx(a_comp, rel=1e-9)
    assert c.manifest["process"]["complement"]["max_vertices"] <= 8190
    # OASIS holds the same pieces
    oas = gdstk.read_oas(str(c.files["oas"])).top_level()[0]
    assert len([p for p in oas.polygons if p.layer == 1]) == len(comp)


def test_write_field_shift_no_straddle_and_counts(tmp_path):
    d = copy.deepcopy(SMALL_DESIGN)
    d["mask"].update({"formats": ["gds"]})
    base = _compile(tmp_path, d, "n")
    fins, _ = _polys(base.files["gds"], 1, 0)
    grid = WriteFieldGrid.from_um(5.0, (0.1, 0.1), db_unit_nm=1.0)
    arr = np.stack(fins).astype(np.int64)
    # independent brute-force count: a fin straddles when its x or y extent contains a field boundary strictly
    lo, hi = arr.min(axis=1), arr.max(axis=1)
    brute = 0
    for k in range(len(arr)):  # brute force on purpose (test oracle)
        crosses = False
        for ax in (0, 1):
            for b in range(-20, 21):
                line = 100 + 5000 * b
                if lo[k, ax] < line < hi[k, ax]:
                    crosses = True
        brute += crosses
    d2 = copy.deepcopy(d)
    d2["mask"]["write_field"] = {"size_um": 5.0, "origin_um": [0.1, 0.1], "straddle": "shift",
                                 "max_shift_nm": 200.0}
    res = _compile(tmp_path, d2, "w")
    counts = res.manifest["process"]["write_field"]["counts"]
    assert counts["straddling"] == brute > 0
    # "shift" leaves nothing out: what cannot be shifted stays in place and is counted
    assert counts["shifted"] + counts["kept_straddling"] == brute and counts["dropped"] == 0
    fins2, _ = _polys(res.files["gds"], 1, 0)
    arr2 = np.stack(fins2).astype(np.int64)
    c2 = np.rint(arr2.mean(axis=1)).astype(np.int64)
    assert int(straddles_write_field(c2, arr2 - c2[:, None, :], grid).sum()) == counts["kept_straddling"]
    assert len(fins2) == len(fins)
    d4 = copy.deepcopy(d2)
    d4["mask"]["write_field"]["straddle"] = "shift-or-drop"
    res4 = _compile(tmp_path, d4, "w4")
    c4 = res4.manifest["process"]["write_field"]["counts"]
    assert c4["shifted"] + c4["dropped"] == brute and c4["shifted"] == counts["shifted"]
    assert res4.manifest["counts"]["sites"] == len(fins) - c4["dropped"]
    d3 = copy.deepcopy(d2)
    d3["mask"]["write_field"]["straddle"] = "drop"
    res3 = _compile(tmp_path, d3, "w3")
    assert res3.manifest["process"]["write_field"]["counts"]["dropped"] == brute
    assert res3.manifest["counts"]["sites"] == len(fins) - brute


def test_marks_and_dose_datatypes(tmp_path):
    d = copy.deepcopy(SMALL_DESIGN)
    d["mask"].update({"formats": ["gds"], "marks": {"kind": "cross", "size_um": 20.0, "line_width_um": 2.0},
                      "dose_datatypes": {load_library("tio2-nanofin-532").cells[0].id: 7, "frame": 9}})
    res = _compile(tmp_path, d, "m")
    marks, _ = _polys(res.files["gds"], 4)
    assert len(marks) == 4 and all(len(m) == 12 for m in marks)
    frame, frame_dt = _polys(res.files["gds"], 2)
    assert set(frame_dt) == {9}
    fins, fin_dt = _polys(res.files["gds"], 1)
    assert set(fin_dt) == {7}
    outer = max(np.abs(np.concatenate(frame)).max(axis=0))
    for m in marks:
        assert np.abs(m).min(axis=0).max() >= outer  # outside the frame's outer edge on at least one axis


def test_marks_overlapping_frame_refused(tmp_path, capsys):
    from metalay.cli import main

    d = copy.deepcopy(SMALL_DESIGN)
    d["mask"]["marks"] = {"positions_um": [[0.0, 0.0]], "size_um": 5.0, "line_width_um": 1.0}
    design = write_toml(tmp_path / "d.toml", d)
    assert main(["compile", str(design), "-o", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "mask.marks.positions_um" in err and "\n" not in err.strip()


def _two_size_library(tmp_path, with_biased=True):
    from metalay.cells.library import CellLibrary, CellSpec, save_library

    # invented test library (closed-form responses stated here, not physics data)
    cells = [CellSpec("fin-a", "nanofin", "fins", (("length_nm", 250.0), ("width_nm", 85.0)))]
    tl = [[1.0 + 0j, 1.0 + 0j]]
    ts = [[-1.0 + 0j, -1.0 + 0j]]
    if with_biased:
        cells.append(CellSpec("fin-b", "nanofin", "fins", (("length_nm", 270.0), ("width_nm", 105.0))))
        tl.append([0.9 + 0j, 0.9 + 0j])
        ts.append([-0.5 + 0j, -0.5 + 0j])
    lib = CellLibrary(name="two-size", description="invented test library", mode="transmission",
                      phase_mechanism="geometric", design_wavelength_nm=532.0, period_nm=325.0, lattice="square",
                      incident_medium="air", exit_medium="air", layers=({"name": "fins", "material": "n=2.4",
                                                                         "thickness_nm": 600.0, "patterned": True},),
                      rules={"min_feature_nm": 60.0, "min_gap_nm": 10.0, "grid_nm": 1.0, "source": "test"},
                      provenance={}, cells=tuple(cells), wavelengths_nm=np.array([500.0, 560.0]),
                      t_long=np.array(tl), t_short=np.array(ts), power_long=np.ones((len(cells), 2)),
                      power_short=np.ones((len(cells), 2)))
    save_library(lib, tmp_path)
    return str(tmp_path / "two-size.library.json")


@pytest.mark.parametrize("with_biased", [True, False])
def test_optics_uses_response_at_biased_size(tmp_path, with_biased):
    # Jones algebra (design notes; Bomzon et al. 2002, Opt. Lett. 27, 1141): converted power |(t_l - t_s)/2|^2
    d = copy.deepcopy(SMALL_DESIGN)
    d["design"]["library"] = _two_size_library(tmp_path, with_biased)
    d["mask"].update({"bias_nm": 10.0, "cell": "fin-a", "formats": ["gds"]})
    d["checks"] = {"rules": False, "optics": True}
    res = _compile(tmp_path, d, "o")
    opt = res.manifest["checks"]["optics"]
    text = " ".join(opt["notes"])
    conv = opt["figures"]["power_budget"]["converted"]
    if with_biased:
        assert "fin-b" in text
        expected = abs((0.9 - (-0.5)) / 2) ** 2
    else:
        assert "no nanofin at the biased size" in text
        expected = 1.0
    assert conv == pytest.approx(expected, rel=1e-6)


def test_slot_library_mask_optics_matches_jones(tmp_path):
    # complementary cells: a solver-built slot library compiles and the optical check of the written mask gives
    # the converted power |(t_long - t_short)/2|^2 of its cell (Jones algebra, Bomzon et al. 2002, Opt. Lett.
    # 27, 1141)
    lib = load_library("au-slot-1550")
    assert lib.cells[0].kind == "slot" and "solver" in lib.provenance and lib.provenance["solver"]
    d = copy.deepcopy(SMALL_DESIGN)
    d["design"].update({"library": "au-slot-1550", "wavelength_nm": 1550.0, "input_spin": -1})
    d["phase"] = [{"kind": "vortex", "charge": 2}]
    d["aperture"] = {"shape": "circle", "diameter_um": 40.0}
    d["lattice"] = {"kind": "square", "period_nm": 600.0}
    d["checks"] = {"rules": True, "optics": True}
    res = _compile(tmp_path, d, "slot")
    tl, ts = lib.response_at(1550.0)
    conv = res.manifest["checks"]["optics"]["figures"]["power_budget"]["converted"]
    assert conv == pytest.approx(abs((tl[0] - ts[0]) / 2) ** 2, rel=1e-6)
    assert res.manifest["checks"]["rules"]["status"] == "clean"


def test_babinet_estimate_labelled_and_refused_for_reflection(tmp_path, capsys):
    from metalay.cli import main

    # Babinet's principle (Booker 1946, J. IEE 93 (IIIA), 620): slot(E along one axis) = 1 - antenna(other axis),
    # valid for thin, highly conducting screens only: a dielectric fin library is refused with the reason.
    assert main(["cells", "complement", "asi-nanofin-1550", "-o", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "not a metal" in err and "Re(eps)" in err and len(err.strip().splitlines()) == 1
    assert not list(tmp_path.iterdir())
    # a thin gold antenna library (responses invented, demo data) is accepted and labelled as an estimate
    ant = replace(load_library("au-antenna-825-reflect"), mode="transmission", exit_medium="air",
                  layers=({"name": "antennas", "material": "Au", "thickness_nm": 40.0, "patterned": True},),
                  source_path=None)
    ant = replace(ant, t_long=np.full(ant.t_long.shape, 0.3 + 0.4j), t_short=np.full(ant.t_long.shape, 0.9 + 0j),
                  power_long=None, power_short=None)
    save_library(ant, tmp_path / "ant")
    assert main(["cells", "complement", str(tmp_path / "ant" / f"{ant.name}.library.json"), "-o",
                 str(tmp_path / "est")]) == 0
    est = load_library(tmp_path / "est" / f"{ant.name}-babinet-slots.library.json")
    assert "estimate" in est.provenance["responses_source"] and est.cells[0].kind == "slot"
    assert np.allclose(est.t_long, 1 - ant.t_short) and np.allclose(est.t_short, 1 - ant.t_long)
    assert main(["cells", "complement", "au-antenna-825-reflect", "-o", str(tmp_path / "r")]) == 2
    assert "transmission antenna library" in capsys.readouterr().err


def test_one_cell_per_write_field(tmp_path):
    d = copy.deepcopy(SMALL_DESIGN)
    # "shift-or-drop": every element written lies inside one field ("shift" would keep unshiftable ones in place)
    d["mask"]["write_field"] = {"size_um": 6.0, "origin_um": [0.05, 0.05], "straddle": "shift-or-drop",
                                "max_shift_nm": 200.0, "cell_per_field": True}
    res = _compile(tmp_path, d, "f")
    grid = WriteFieldGrid.from_um(6.0, (0.05, 0.05), db_unit_nm=1.0)
    for fmt in ("gds", "oas"):
        lib = gdstk.read_gds(str(res.files["gds"])) if fmt == "gds" else gdstk.read_oas(str(res.files["oas"]))
        top = lib.top_level()[0]
        assert all(r.rotation == 0 and tuple(r.origin) == (0, 0) for r in top.references)
        total = 0
        for ref in top.references:
            cell = ref.cell
            ix, iy = (int(t.replace("M", "-")) for t in cell.name.split("_WF_X")[1].split("_Y"))
            x0 = (grid.origin_db[0] + ix * grid.size_db[0]) / 1000
            y0 = (grid.origin_db[1] + iy * grid.size_db[1]) / 1000
            for p in cell.polygons:
                offs = p.repetition.get_offsets() if p.repetition.size else np.zeros((1, 2))
                pts = p.points[None, :, :] + offs[:, None, :]
                # every element lies inside its own field (no straddling after the shift)
                assert pts[..., 0].min() >= x0 - 1e-9 and pts[..., 0].max() <= x0 + 6.0 + 1e-9
                assert pts[..., 1].min() >= y0 - 1e-9 and pts[..., 1].max() <= y0 + 6.0 + 1e-9
                total += len(offs)
        assert total == res.manifest["counts"]["sites"]
