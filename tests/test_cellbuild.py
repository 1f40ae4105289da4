"""Library builder: spec validation, picking, Jones consistency, determinism, import, bundled libraries, CLI."""

from pathlib import Path

import numpy as np
import pytest

from metalay.cells.cellbuild import SweepResult, build_library, import_responses, load_build_spec, pick_propagation
from metalay.cells.library import load_library, save_library
from metalay.cells.rcwa import Layer, Stack, rect_pattern, solve
from metalay.errors import CellBuildError

SPECS = Path(__file__).resolve().parent.parent / "libraries" / "specs"

SMALL = """
[library]
name = "tiny-fins"
description = "test"
mode = "transmission"
phase_mechanism = "geometric"
design_wavelength_nm = 532.0
period_nm = 325.0
geometry_source = "test geometry (invented, demo only)"

[stack]
incident_medium = "fused_silica"
exit_medium = "air"

[[stack.layers]]
name = "fins"
material = "n=2.4"
background = "air"
thickness_nm = 600.0
patterned = true

[rules]
min_feature_nm = 60.0
min_gap_nm = 40.0
max_aspect_ratio = 10.0
grid_nm = 1.0
source = "Common practice (no source)"

[sweep]
kind = "nanofin"
length_nm = [200.0, 250.0, 290.0]
width_nm = [50.0, 85.0, 120.0]

[solver]
harmonics_x = 3
harmonics_y = 3
tolerance_abs_t = 5e-3
tolerance_phase_deg = 2.0
max_harmonics = 7

[band]
relative_half_width = 0.1
count = 3
"""


@pytest.fixture(scope="module")
def small_build(tmp_path_factory):
    d = tmp_path_factory.mktemp("spec")
    p = d / "tiny.toml"
    p.write_text(SMALL)
    spec = load_build_spec(p)
    lib, sw = build_library(spec)
    return spec, lib, sw, d


def test_rules_filter_and_pick(small_build):
    spec, lib, sw, _ = small_build
    # 290 x 120 has circumscribed diameter 314 > 325 - 40; width 50 < 60 nm min feature -> excluded
    assert sw.n_candidates == 9
    assert not np.any(sw.dims["width_nm"] < 60)
    assert np.all(np.hypot(sw.dims["length_nm"], sw.dims["width_nm"]) + 40 <= 325 + 1e-9)
    ce = np.abs((sw.t_long - sw.t_short) / 2) ** 2
    cell = lib.cells[0]
    best = int(np.argmax(ce))
    assert cell.dim("length_nm") == sw.dims["length_nm"][best] and cell.dim("width_nm") == sw.dims["width_nm"][best]
    # the library's design-wavelength response is the solver's answer for that cell at the truncation recorded
    # for that point (Consistency check: the file states how each number was computed)
    st = Stack(np.array([1.4607063448921334**2]), (Layer(600.0, rect_pattern(cell.dim("length_nm"),
               cell.dim("width_nm"), 2.4**2, 1.0, 325.0, 325.0)),), np.array([1.0]), 325.0, 325.0)
    pt = next(q for q in lib.provenance["solver"]["convergence"]["points"] if q["wavelength_nm"] == 532.0)
    t = solve(st, 532.0, harmonics=(pt["harmonics_x"], pt["harmonics_y"])).t_jones[0]
    k = int(np.argmin(np.abs(lib.wavelengths_nm - 532.0)))
    assert abs(lib.t_long[0, k] - t[0, 0]) < 1e-9 and abs(lib.t_short[0, k] - t[1, 1]) < 1e-9
    # every band point carries its truncation and the change achieved, within the spec's tolerances
    conv = lib.provenance["solver"]["convergence"]
    assert len(conv["points"]) == lib.wavelengths_nm.size and conv["tolerance_abs_t"] == 5e-3
    for q in conv["points"]:
        assert q["converged"] and q["change_abs_t"] <= 5e-3 and q["change_phase_deg"] <= 2.0
        assert q["lossless"] and abs(q["r_plus_t_long"] - 1) < 1e-6      # Source: Poynting's theorem


def test_half_wave_plate_consistency(small_build):
    # Source: Jones calculus (Jones 1941, JOSA 31, 488) and the design notes: conversion efficiency
    # |(tl - ts)/2|^2 = (|tl|^2 + |ts|^2 - 2 |tl||ts| cos(dphi)) / 4 for the cell built for geometric phase.
    _, lib, _, _ = small_build
    tl, ts = lib.t_long[0], lib.t_short[0]
    dphi = np.angle(tl) - np.angle(ts)
    ce = np.abs((tl - ts) / 2) ** 2
    assert np.allclose(ce, (np.abs(tl) ** 2 + np.abs(ts) ** 2 - 2 * np.abs(tl) * np.abs(ts) * np.cos(dphi)) / 4,
                       atol=1e-12)
    assert np.all(lib.power_long >= np.abs(tl) ** 2 - 1e-9) and np.all(lib.power_long <= 1 + 1e-9)


def test_deterministic_and_round_trip(small_build, tmp_path):
    # Consistency check (not an outside reference): a rebuild gives the same bytes; write-then-read is the identity.
    spec, lib, _, _ = small_build
    a = save_library(lib, tmp_path / "a")
    lib2, _ = build_library(spec)
    b = save_library(lib2, tmp_path / "b")
    for pa, pb in zip(a, b):
        assert pa.read_bytes() == pb.read_bytes()
    back = load_library(a[0])
    assert np.array_equal(back.t_long, lib.t_long) and np.array_equal(back.wavelengths_nm, lib.wavelengths_nm)
    assert back.provenance["solver"]["sweep_harmonics_x"] == 3
    import re
    assert not re.search(r"(19|20)\d\d-\d\d-\d\d", a[0].read_text())   # date-free


@pytest.mark.parametrize("patch,match", [
    (('mode = "transmission"', 'mode = "sideways"'), "mode"),
    (("period_nm = 325.0", "period_nm = -3.0"), "period_nm"),
    (('material = "n=2.4"', 'material = "unobtainium"'), "unknown material"),
    (("harmonics_x = 3", "harmonics_x = 99"), "harmonics_x"),
    (("max_harmonics = 7", "convergence_extra = [2]"), "no longer used"),
    (("tolerance_abs_t = 5e-3", "tolerance_abs_t = 0.5"), "tolerance_abs_t"),
    (('kind = "nanofin"', 'kind = "round_pillar"'), "kind"),
])
def test_spec_errors_name_file_and_key(tmp_path, patch, match):
    p = tmp_path / "bad.toml"
    p.write_text(SMALL.replace(*patch))
    with pytest.raises(CellBuildError, match=match) as ei:
        load_build_spec(p)
    assert "bad.toml" in str(ei.value) or match == "unknown material"


def test_no_geometry_passes_rules(tmp_path):
    p = tmp_path / "strict.toml"
    p.write_text(SMALL.replace("min_feature_nm = 60.0", "min_feature_nm = 200.0"))
    with pytest.raises(CellBuildError, match="no geometry"):
        build_library(load_build_spec(p))


def test_pick_propagation_covers_levels():
    # synthetic responses: 36 pillars with phases 0..350 deg and amplitude 0.9 except a dip -> picks avoid the dip
    ph = np.deg2rad(np.arange(0, 360, 10.0))
    amp = np.where(np.arange(36) == 9, 0.2, 0.9)
    t = amp * np.exp(1j * ph)
    sw = SweepResult({"diameter_nm": np.arange(36.0)}, t, t, amp**2, amp**2, 36)
    idx = pick_propagation(sw, 8)
    assert 9 not in idx and len(set(idx.tolist())) == 8
    steps = np.diff(np.sort(np.rad2deg(ph[idx])))
    assert np.all(np.abs(steps - 45) <= 10)


META = """
[library]
name = "imported"
mode = "transmission"
phase_mechanism = "geometric"
design_wavelength_nm = 532.0
period_nm = 325.0
geometry_source = "user test"
responses_source = "user FDTD (test data, invented)"
[stack]
incident_medium = "fused_silica"
exit_medium = "air"
[[stack.layers]]
name = "fins"
material = "TiO2"
thickness_nm = 600.0
patterned = true
[rules]
min_feature_nm = 60.0
min_gap_nm = 40.0
max_aspect_ratio = 10.0
grid_nm = 1.0
source = "Common practice (no source)"
[[cells]]
id = "a"
kind = "nanofin"
layer = "fins"
length_nm = 250.0
width_nm = 85.0
"""
HEADER = "cell_id,wavelength_nm,t_long_re,t_long_im,t_short_re,t_short_im,power_long,power_short\n"


def test_import_good_and_bad(tmp_path):
    meta = tmp_path / "meta.toml"
    meta.write_text(META)
    good = tmp_path / "good.csv"
    good.write_text(HEADER + "a,540,0.5,0.5,-0.6,0.1,0.9,0.9\na,520,0.5,0.4,-0.6,0.2,0.9,\n")
    lib = import_responses(good, meta)
    assert lib.wavelengths_nm.tolist() == [520.0, 540.0]
    assert lib.t_long[0, 1] == 0.5 + 0.5j and np.isnan(lib.power_short[0, 0])
    assert lib.provenance["responses_source"].startswith("imported")
    save_library(lib, tmp_path / "out")
    assert load_library(tmp_path / "out" / "imported.library.json").has_responses
    cases = {
        "header": "cell,wl\n",
        "outside 100..20000": HEADER + "a,0.54,0.5,0.5,-0.6,0.1,0.9,0.9\n",      # micrometres, not nm
        "passive": HEADER + "a,540,0.9,0.9,-0.6,0.1,0.9,0.9\n",
        "not in": HEADER + "a,540,0.5,0.5,-0.6,0.1,0.9,0.9\nb,540,0.5,0.5,-0.6,0.1,0.9,0.9\n",
        "non-numeric": HEADER + "a,540,x,0.5,-0.6,0.1,0.9,0.9\n",
    }
    for match, text in cases.items():
        bad = tmp_path / "bad.csv"
        bad.write_text(text)
        with pytest.raises(CellBuildError, match=match):
            import_responses(bad, meta)


BUNDLED = ["tio2-nanofin-532", "tio2-nanofin-633", "asi-nanofin-1550", "au-antenna-825-reflect", "tio2-pillar-532",
           "au-slot-1550"]


@pytest.mark.parametrize("name", BUNDLED)
def test_bundled_libraries_are_solver_built(name):
    lib = load_library(name)          # also runs the passivity / energy checks of every load
    assert lib.has_responses
    so = lib.provenance["solver"]
    assert so["name"] == "metalay.rcwa" and so["factorization"].startswith("li:")
    assert lib.provenance["responses_source"] == f"metalay cells build {name}.toml"
    assert (SPECS / f"{name}.toml").is_file()
    # convergence is recorded at every tabulated point; dielectric libraries meet the default target (2e-3 in
    # |t|, 0.5 deg) everywhere; the gold libraries state a looser target and flag the points that miss it
    conv = so["convergence"]
    pts = conv["points"]
    assert len(pts) == len(lib.cells) * lib.wavelengths_nm.size
    metal = any(lay["material"] == "Au" or lay.get("background") == "Au" for lay in lib.layers)
    if not metal:
        assert conv["tolerance_abs_t"] == 2e-3 and conv["tolerance_phase_deg"] == 0.5
    if lib.cells[0].kind == "nanofin" and not metal:
        assert conv["all_converged"]
    for q in pts:
        if q["converged"]:
            assert q["change_abs_t"] <= conv["tolerance_abs_t"] and q["change_phase_deg"] <= conv["tolerance_phase_deg"]
        else:                      # only the cap may stop a point short of the target, and the file says so
            assert q["harmonics_x"] + 2 > conv["max_harmonics"] and not conv["all_converged"]
        assert q["harmonics_x"] <= conv["max_harmonics"]
    if lib.phase_mechanism == "propagation":
        assert np.array_equal(lib.t_long, lib.t_short)   # round pillars: polarisation average


def test_bundled_633_library_is_a_lossless_fin_on_glass():
    # Source: refractiveindex.info main/TiO2/Siefke (Siefke et al. 2016, Adv. Opt. Mater. 4, 1780): n ~ 2.39,
    # k ~ 2e-9 at 633 nm; a geometric-phase fin converts most of the light (half-wave-plate-like, Jones 1941).
    lib = load_library("tio2-nanofin-633")
    assert lib.design_wavelength_nm == 633.0 and lib.incident_medium == "fused_silica"
    assert "Siefke" in lib.provenance["materials"]["TiO2"]["dataset"]
    tl, ts = lib.response_at(633.0)
    assert abs((tl[0] - ts[0]) / 2) ** 2 > 0.8


def test_bundled_visible_fin_is_converged_and_reproducible():
    # Consistency check: re-solving the bundled cell at the truncation recorded for a band point reproduces the
    # library; Convergence check: 2 more orders change it by no more than the recorded change.
    lib = load_library("tio2-nanofin-532")
    spec = load_build_spec(SPECS / "tio2-nanofin-532.toml")
    from metalay.cells.cellbuild import _responses

    cell = lib.cells[0]
    dims = {"length_nm": np.array([cell.dim("length_nm")]), "width_nm": np.array([cell.dim("width_nm")])}
    k = int(np.argmin(np.abs(lib.wavelengths_nm - 532.0)))
    pt = lib.provenance["solver"]["convergence"]["points"][k]
    assert pt["wavelength_nm"] == 532.0
    h = pt["harmonics_x"], pt["harmonics_y"]
    tl, ts, _, _ = _responses(spec, dims, lib.film_height_nm, 532.0, h)
    assert abs(tl[0] - lib.t_long[0, k]) < 1e-9 and abs(ts[0] - lib.t_short[0, k]) < 1e-9
    tl0, ts0, _, _ = _responses(spec, dims, lib.film_height_nm, 532.0, (h[0] - 2, h[1] - 2))
    change = max(abs(abs(tl0[0]) - abs(tl[0])), abs(abs(ts0[0]) - abs(ts[0])))
    assert abs(change - pt["change_abs_t"]) <= 1e-3 * change + 1e-12 and change <= 2e-3


def _edited_library(tmp_path, **changes):
    from dataclasses import replace

    lib = replace(load_library("tio2-nanofin-532"), **changes)
    folder = tmp_path / "lib"
    folder.mkdir(exist_ok=True)
    from metalay.cells.library import library_to_json, responses_to_csv

    (folder / f"{lib.name}.library.json").write_text(library_to_json(lib))
    (folder / f"{lib.name}.responses.csv").write_text(responses_to_csv(lib))
    return folder / f"{lib.name}.library.json"


@pytest.mark.parametrize("what,match", [("gain", "t_long|^2 = 1.21"), ("power", "exceeds power_short"),
                                        ("balance", "R \\+ T"), ("power_above_one", "power_long = 1.5")])
def test_unphysical_libraries_are_refused_on_load(tmp_path, what, match):
    # Source: Poynting's theorem: a passive cell has |t|^2 <= total output power <= 1, and R + T = 1 when lossless.
    from metalay.errors import LibraryError

    lib = load_library("tio2-nanofin-532")
    tl, ts, pl, ps = lib.t_long.copy(), lib.t_short.copy(), lib.power_long.copy(), lib.power_short.copy()
    prov = lib.provenance
    if what == "gain":
        tl[0, 3] = 1.1
    elif what == "power":
        ps[0, 5] = abs(ts[0, 5]) ** 2 - 0.01
    elif what == "power_above_one":
        pl[0, 2] = 1.5
    else:
        import copy

        prov = copy.deepcopy(prov)
        prov["solver"]["convergence"]["points"][4]["r_plus_t_short"] = 0.99
        prov["solver"]["convergence"]["points"][4]["lossless"] = True
    path = _edited_library(tmp_path, t_long=tl, power_long=pl, power_short=ps, provenance=prov)
    with pytest.raises(LibraryError, match=match) as ei:
        load_library(path)
    msg = str(ei.value)
    assert "fin-" in msg and " nm" in msg and "\n" not in msg


def test_rotated_lattice_supercell_sites():
    # Geometry (Common practice (no source)): the square lattice rotated by atan(q/p) is periodic on an
    # axis-aligned square of side a sqrt(p^2 + q^2) holding p^2 + q^2 sites, all a apart or more.
    from metalay.cells.cellbuild import _rotated_lattice_sites

    for p, q in ((1, 1), (2, 1), (1, 2)):
        pts = _rotated_lattice_sites(100.0, p, q)
        assert len(pts) == p * p + q * q
        side = 100.0 * np.hypot(p, q)
        d = pts[:, None, :] - pts[None, :, :]
        d = (d + side / 2) % side - side / 2
        dist = np.hypot(d[..., 0], d[..., 1]) + np.eye(len(pts)) * 1e9
        assert abs(dist.min() - 100.0) < 1e-6


def test_rotation_check_command_stores_its_result(tmp_path, capsys):
    # Rotation model (Bomzon et al. 2002, Opt. Lett. 27, 1141): the converted phase of a cell rotated by theta
    # changes by 2 sigma theta; the direct solve differs by the model's limit, stored in the library file.
    from metalay.cli import main

    d = tmp_path / "spec"
    d.mkdir()
    (d / "tiny.toml").write_text(SMALL)
    lib, _ = build_library(load_build_spec(d / "tiny.toml"))
    save_library(lib, tmp_path / "lib")
    path = tmp_path / "lib" / "tiny-fins.library.json"
    assert main(["cells", "rotation-check", str(path), "--angles", "30", "45", "--max-harmonics", "5"]) == 0
    out = capsys.readouterr().out
    assert "phase step spin +1" in out
    rec = load_library(path).extra["rotation_check"]
    r30, r45 = rec["cells"][0]["angles"]
    assert r30["angle_deg"] == 30.0 and r30["method"] == "normal-vector" and r45["method"] == "supercell"
    for row in (r30, r45):
        a = row["angle_deg"]
        assert abs(row["phase_step_spin_plus_deg"] - 2 * a) < 5 and abs(row["phase_step_spin_minus_deg"] + 2 * a) < 5
        assert row["deviation_spin_plus_deg"] == pytest.approx(row["phase_step_spin_plus_deg"] - 2 * a, abs=1e-6)
    assert main(["cells", "rotation-check", str(path), "--angles", "120"]) == 2
    assert "(0, 90]" in capsys.readouterr().err


def test_cli_show_and_errors(tmp_path, capsys):
    from metalay.cli import main

    png = tmp_path / "lib.png"
    assert main(["cells", "show", "tio2-nanofin-532", "--png", str(png)]) == 0
    out = capsys.readouterr().out
    assert "conversion" in out and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    bad = tmp_path / "bad.toml"
    bad.write_text("[library]\n")
    assert main(["cells", "build", str(bad)]) == 2
    assert "bad.toml" in capsys.readouterr().err
