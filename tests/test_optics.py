"""Optical check from written masks: Jones algebra, quantised gratings, multiplexing, lenses, end to end."""


import numpy as np
import pytest

from metalay.cells.library import CellLibrary, CellSpec
from metalay.checks import optics
from metalay.design.spec import parse_design

LAM = 532.0
P_NM = 325.0


def make_library(t_long=1.0, t_short=-1.0, lattice="square", period_nm=P_NM):
    cell = CellSpec(id="fin", kind="nanofin", layer="fins", dims_nm=(("length_nm", 250.0), ("width_nm", 85.0)))
    return CellLibrary(name="test-fins", description="invented test library", mode="transmission",
                       phase_mechanism="geometric", design_wavelength_nm=LAM, period_nm=period_nm, lattice=lattice,
                       incident_medium="air", exit_medium="air", layers=(), rules={}, provenance={}, cells=(cell,),
                       wavelengths_nm=np.array([LAM]), t_long=np.array([[complex(t_long)]]),
                       t_short=np.array([[complex(t_short)]]), power_long=np.array([[1.0]]),
                       power_short=np.array([[1.0]]), sha256="0" * 64)


def write_fins_gds(path, x_nm, y_nm, theta):
    """A real GDSII mask of rotated 250 x 85 nm fins (gdstk), vertices snapped about integer-nm centres."""
    import gdstk

    corners = np.array([[0.5, 0.5], [-0.5, 0.5], [-0.5, -0.5], [0.5, -0.5]]) * [250.0, 85.0]
    c, s = np.cos(theta)[:, None], np.sin(theta)[:, None]
    vx = np.rint(c * corners[:, 0] - s * corners[:, 1]) + np.rint(x_nm)[:, None]
    vy = np.rint(s * corners[:, 0] + c * corners[:, 1]) + np.rint(y_nm)[:, None]
    lib = gdstk.Library(unit=1e-6, precision=1e-9)
    cell = lib.new_cell("TOP")
    pts = np.stack([vx, vy], -1) * 1e-3
    for q in pts:  # test fixture writer (the benchmark has the vectorised writer)
        cell.add(gdstk.Polygon(q, layer=1, datatype=0))
    lib.write_gds(str(path))
    return path


def square_sites(n):
    jj, ii = np.divmod(np.arange(n * n), n)
    return ii - n // 2, jj - n // 2


@pytest.mark.parametrize("levels", [2, 4, 8, 16])
def test_quantised_blazed_grating_efficiency_swanson(tmp_path, levels):
    # Source: Swanson 1989, MIT Lincoln Laboratory Technical Report 854, "Binary optics technology":
    # first-order efficiency of an N-level staircase approximation of a blazed grating is sinc^2(1/N).
    n = 128  # a whole number of grating periods across the window: the DFT orders are exact
    ii, jj = square_sites(n)
    # binary: two sites per level so that the +1 order lies inside the sampled zone (|u| < lambda / 2p), not on
    # its edge; the staircase (and Swanson's result) depends only on the number of levels per period
    per_level = 2 if levels == 2 else 1
    level = np.mod(ii // per_level, levels)
    phi = 2 * np.pi * level / levels
    theta = np.mod(phi / 2, np.pi)  # sigma = +1: theta = phi / 2
    path = write_fins_gds(tmp_path / "grating.gds", ii * P_NM, jj * P_NM, theta)
    u_design = LAM / (levels * per_level * P_NM)
    target = optics.OpticsTarget(wavelength_nm=LAM, sigma=1, charge=None, direction=(u_design, 0.0))
    res = optics.check_optics(path, make_library(), target=target,
                              options=optics.OpticsOptions(pad_factor=1.0, make_plots=False))
    eff = res.figures["far_field"]["fractions_of_designed_polarization"]["designed"]
    expected = np.sinc(1.0 / levels) ** 2
    # tolerance 1e-3: 1 nm vertex snapping leaves <= 0.5 deg of geometric-phase error (efficiency loss < 1e-4)
    assert eff == pytest.approx(expected, abs=1e-3)
    # Source: Born & Wolf, Principles of Optics, 7th ed., sec. 8.6.1: sin(theta) = lambda / Lambda
    pos = res.figures["designed_spot_position"]["measured"]
    assert pos[0] == pytest.approx(u_design, abs=1e-6) and abs(pos[1]) < 1e-9


def test_jones_powers_uniform_rotation(tmp_path):
    # Source: Bomzon, Kleiner & Hasman 2001, Opt. Lett. 26, 1424 (space-variant gratings): for circular input the
    # converted power is |(t_l - t_s)/2|^2 and the unconverted |(t_l + t_s)/2|^2.
    tl, ts = 0.9 * np.exp(0.2j), 0.45 * np.exp(2.5j)
    ii, jj = square_sites(24)
    # rotation 0: the snapped fins are exact rectangles, so the decoded rotation is exact as well
    path = write_fins_gds(tmp_path / "uniform.gds", ii * P_NM, jj * P_NM, np.zeros(ii.size))
    lib = make_library(tl, ts)
    for pol in ("spin+1", "spin-1"):
        sigma = 1 if pol == "spin+1" else -1
        target = optics.OpticsTarget(wavelength_nm=LAM, sigma=sigma, charge=None)
        b = optics.check_optics(path, lib, target=target, options=optics.OpticsOptions(make_plots=False))
        budget = b.figures["power_budget"]
        assert budget["converted"] == pytest.approx(abs((tl - ts) / 2) ** 2, rel=1e-6)
        assert budget["leakage"] == pytest.approx(abs((tl + ts) / 2) ** 2, rel=1e-6)
        assert budget["other_polarization"] == pytest.approx(abs((tl + ts) / 2) ** 2, rel=1e-6)
    # linear input: half of each circular part converts (|a_+|^2 = |a_-|^2 = 1/2)
    lin = optics.check_optics(path, lib, target=optics.OpticsTarget(wavelength_nm=LAM, charge=None),
                              options=optics.OpticsOptions(polarization="linear:30", make_plots=False)
                              ).figures["power_budget"]
    assert lin["converted"] == pytest.approx(0.5 * abs((tl - ts) / 2) ** 2, rel=1e-6)
    # Source: Hecht, Optics, 5th ed., sec. 8.13 (Jones calculus): a linear retarder-polariser passes
    # |t_l|^2 cos^2(a) + |t_s|^2 sin^2(a), a = angle between the input polarisation and the long axis
    a = np.radians(30.0)
    assert lin["zeroth_order_total"] == pytest.approx(abs(tl) ** 2 * np.cos(a) ** 2 + abs(ts) ** 2 * np.sin(a) ** 2,
                                                      rel=1e-6)


def test_site_fields_match_explicit_jones_matrix():
    # the circular-basis formula against the 2x2 product R(-theta) diag(t_l, t_s) R(theta) E_in
    rng = np.random.default_rng(5)
    tl = rng.normal(size=7) + 1j * rng.normal(size=7)
    ts = rng.normal(size=7) + 1j * rng.normal(size=7)
    th = rng.uniform(0, np.pi, 7)
    ein = optics.input_jones("linear:17")
    f = optics.site_fields(tl, ts, th, ein, sigma=-1)
    for k in range(7):
        c, s = np.cos(th[k]), np.sin(th[k])
        rot = np.array([[c, s], [-s, c]])
        out = rot.T @ np.diag([tl[k], ts[k]]) @ rot @ ein
        plus = np.array([1, 1j]) / np.sqrt(2)
        minus = np.array([1, -1j]) / np.sqrt(2)
        # designed output for sigma = -1 is |+1>
        assert np.vdot(plus, out) == pytest.approx(complex(f.designed[k]), abs=1e-6)
        assert np.vdot(minus, out) == pytest.approx(complex(f.other[k]), abs=1e-6)


def _design(terms, diameter_um, period_nm=P_NM, lattice="square"):
    return parse_design({"design": {"name": "t", "wavelength_nm": LAM, "input_spin": 1, "library": "x"},
                         "phase": terms, "aperture": {"shape": "circle", "diameter_um": diameter_um},
                         "lattice": {"kind": lattice, "period_nm": period_nm}})


def _mask_from_design(tmp_path, design, name):
    from metalay.design.lattice import sample_sites
    from metalay.design.phase import target_phase

    s = sample_sites(design.aperture, design.lattice)
    phi = target_phase(design.terms, s.x_um, s.y_um, wavelength_nm=LAM, sigma=design.sigma)
    theta = np.mod(design.sigma * phi / 2, np.pi)
    return write_fins_gds(tmp_path / name, s.x_um * 1e3, s.y_um * 1e3, theta)


def test_vortex_with_tilt_end_to_end_oam_fringes_and_report(tmp_path):
    design = _design([{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}], 40.0)
    path = _mask_from_design(tmp_path, design, "vortex.gds")
    out = tmp_path / "out"
    res = optics.check_optics(path, make_library(), design=design, out_dir=out)
    f = res.figures
    assert f["oam"]["purity"] > 0.98
    assert f["fringe_reading"]["charge"] == 3
    assert f["designed_spot_position"]["deflection_deg"] == pytest.approx(4.0, abs=0.05)
    assert f["power_budget"]["converted"] == pytest.approx(1.0, abs=1e-6)
    assert f["phase_error_deg"]["rms"] < 0.5
    html = (out / "optics_report.html").read_text()
    assert "design aid" in html and "data:image/png;base64," in html
    # deterministic outputs: a second run gives the same bytes
    res2 = optics.check_optics(path, make_library(), design=design, out_dir=tmp_path / "out2")
    for name, info in res.files.items():
        assert res2.files[name]["sha256"] == info["sha256"], name
    png = (out / "far_field.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and b"Software" not in png


def test_multiplexed_four_channel_crosstalk(tmp_path):
    # Source: Mair et al. 2001, Nature 412, 313: a conjugate vortex turns only its matching channel into an
    # on-axis (solid) spot; the other channels keep a dark vortex core at their spot centres.
    chans = [{"charge": q, "angle_deg": 3.0, "azimuth_deg": az} for q, az in ((-3, 0), (-1, 90), (2, 180), (4, 270))]
    design = _design([{"kind": "multiplex", "channels": chans}], 50.0)
    path = _mask_from_design(tmp_path, design, "mux.gds")
    res = optics.check_optics(path, make_library(), design=design, options=optics.OpticsOptions(make_plots=True))
    ct = res.figures["crosstalk"]
    mat = np.array(ct["matrix"])
    # diagonal-dominant in every row; worst isolation reported
    assert np.all(np.argmax(mat, axis=1) == np.arange(4))
    assert ct["worst_isolation_db"] > 10.0
    # Source: Born & Wolf, grating equation: each carrier sends its channel to sin(theta) = sin(3 deg)
    du = LAM * 1e-3 / (50.0 * 2)  # about half a far-field bin at pad 2
    assert max(ct["position_error"]) < du
    assert "6_crosstalk" in res.images
    print("worst isolation dB", ct["worst_isolation_db"])


def test_lens_focal_spot_against_airy(tmp_path):
    # Source: Born & Wolf, Principles of Optics, 7th ed., sec. 8.5.2 (Airy: first zero 0.61 lambda / NA,
    # FWHM 0.514 lambda / NA) and sec. 9.1 (Strehl ratio 1 for an aberration-free pupil).
    design = _design([{"kind": "lens", "focal_length_um": 200.0}], 50.0)
    path = _mask_from_design(tmp_path, design, "lens.gds")
    res = optics.check_optics(path, make_library(), design=design, options=optics.OpticsOptions(make_plots=False))
    lm = res.figures["lens"]
    assert lm["first_dark_ring_um"] == pytest.approx(lm["airy_radius_um"], rel=0.03)
    assert lm["fwhm_x_um"] == pytest.approx(lm["fwhm_airy_um"], rel=0.03)
    assert lm["strehl"] == pytest.approx(1.0, abs=0.02)
    assert 0.8 < lm["focusing_efficiency"] <= 1.0


def test_hexagonal_lattice_grating_deflects_by_grating_equation(tmp_path):
    lib = make_library(lattice="hexagonal", period_nm=400.0)
    design = _design([{"kind": "tilt", "angle_deg": 5.0}], 30.0, period_nm=400.0, lattice="hexagonal")
    path = _mask_from_design(tmp_path, design, "hex.gds")
    res = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False))
    assert res.figures["designed_spot_position"]["deflection_deg"] == pytest.approx(5.0, abs=0.1)
    assert res.figures["far_field"]["fractions_of_designed_polarization"]["designed"] > 0.9


def test_bad_polarization_and_unmatched_elements(tmp_path):
    from metalay.errors import MaskReadError, MetalayError

    with pytest.raises(MetalayError, match="polarization"):
        optics.input_jones("diagonal")
    ii, jj = square_sites(6)
    path = write_fins_gds(tmp_path / "u.gds", ii * P_NM, jj * P_NM, np.zeros(ii.size))
    small = CellSpec(id="fin", kind="nanofin", layer="fins", dims_nm=(("length_nm", 150.0), ("width_nm", 60.0)))
    lib = make_library()
    lib2 = CellLibrary(**{**lib.__dict__, "cells": (small,)})
    with pytest.raises(MaskReadError, match="match no library cell"):
        optics.check_optics(path, lib2, target=optics.OpticsTarget(wavelength_nm=LAM, charge=None),
                            options=optics.OpticsOptions(make_plots=False))


def test_cli_and_compile_hook(tmp_path):
    from metalay.cli import main

    design = _design([{"kind": "vortex", "charge": -2}], 30.0)
    path = _mask_from_design(tmp_path, design, "cli.gds")
    from metalay.cells.library import save_library

    save_library(make_library(), tmp_path)  # the library whose fins the mask holds (250 x 85 nm)
    toml = tmp_path / "d.toml"
    toml.write_text('[design]\nname = "d"\nwavelength_nm = 532.0\ninput_spin = 1\nlibrary = "test-fins.library.json"\n'
                    '[[phase]]\nkind = "vortex"\ncharge = -2\n[aperture]\nshape = "circle"\ndiameter_um = 30.0\n'
                    '[lattice]\nkind = "square"\nperiod_nm = 325.0\n')
    out = tmp_path / "cli_out"
    assert main(["optics", str(path), "--design", str(toml), "-o", str(out), "--quiet"]) == 0
    import json
    figs = json.loads((out / "optics.json").read_text())
    assert figs["fringe_reading"]["charge"] == -2 and figs["oam"]["purity"] > 0.99
    # bad input: one-line error, exit code 2, no output folder
    assert main(["optics", str(path), "--design", str(toml), "--pad-factor", "0.5", "-o",
                 str(tmp_path / "never")]) == 2
    assert not (tmp_path / "never").exists()
    assert main(["optics", str(tmp_path / "missing.gds"), "--library", "tio2-nanofin-532"]) == 2
    hook = optics.compile_check(path, make_library(), design)
    assert hook["verdict"] == "pass" and hook["status"] == "pass" and "OAM purity" in hook["summary"]
    assert all(not v["path"].startswith("/") for v in hook["files"].values())


@pytest.mark.parametrize("extra_slope_rad_per_um", [0.05, -0.05])
def test_report_phase_error_is_mask_minus_target_with_its_sign(tmp_path, monkeypatch, extra_slope_rad_per_um):
    """A mask written with the target phase plus a known ramp a*x must show a phase error that rises as +a*x, in the
    per-site numbers and in the map the report draws; flipping the sign (target minus mask) gives -a and fails.
    Source: independent calculation (the written ramp is known exactly; the error is its slope after the offset)."""
    from metalay.checks import plots
    from metalay.design.lattice import sample_sites
    from metalay.design.phase import target_phase

    design = _design([{"kind": "vortex", "charge": 1}], 20.0)
    s = sample_sites(design.aperture, design.lattice)
    phi = target_phase(design.terms, s.x_um, s.y_um, wavelength_nm=LAM, sigma=design.sigma)
    theta = np.mod(design.sigma * (phi + extra_slope_rad_per_um * s.x_um) / 2, np.pi)
    path = write_fins_gds(tmp_path / "ramp.gds", s.x_um * 1e3, s.y_um * 1e3, theta)
    seen = {}
    real_section, real_map = optics._phase_error_section, plots.signed_map

    def section(dec, ev, figures):
        seen["site"] = optics._site_phase_error(dec, ev)[0], optics.site_xy(dec.decoded)[0]
        return real_section(dec, ev, figures)

    def signed_map(values, xs, ys, **kw):
        seen["map"] = np.asarray(values), np.asarray(xs), np.asarray(ys), np.asarray(kw["valid"])
        return real_map(values, xs, ys, **kw)

    monkeypatch.setattr(optics, "_phase_error_section", section)
    monkeypatch.setattr(plots, "signed_map", signed_map)
    optics.check_optics(path, make_library(), design=design, out_dir=tmp_path / "out")
    e, x_site = seen["site"]
    slope_site = np.polyfit(x_site, np.asarray(e), 1)[0]
    assert slope_site == pytest.approx(extra_slope_rad_per_um, rel=0.02)
    err_deg, xs, ys, valid = seen["map"]
    xx = np.broadcast_to(xs[None, :], err_deg.shape)
    slope_map = np.radians(np.polyfit(xx[valid], err_deg[valid], 1)[0])
    assert slope_map == pytest.approx(extra_slope_rad_per_um, rel=0.05)
