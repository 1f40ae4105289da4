"""The streamed optical check: far field accumulated tile by tile from block sums, with its stated error bound.

The whole-mask reference here is the exact site sum E(u, v) = sum_s f_s exp(-i k (x_s u + y_s v)) over every site
of the mask read at once (read_mask -> decode_sites -> site_fields, the whole-mask check's own stages), evaluated
directly at the same directions: an equivalence check of the block approximation against its stated bound.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from metalay.checks import optics
from metalay.checks.decode import decode_sites
from metalay.checks.optics_stream import FarFieldAccumulator, check_optics_streamed, phase_bound
from metalay.io.gdsread import read_mask
from test_optics import LAM, P_NM, _design, _mask_from_design, make_library, square_sites, write_fins_gds


def exact_site_sum(path, lib, design, u, v):
    """Direct sum over all sites of the mask (held whole) at directions u (nu,), v (nv,): shape (nv, nu)."""
    flat = read_mask(path, layers=[(1, 0)])
    dec = decode_sites(flat, lib.cells, period_nm=P_NM, lattice="square")
    t_l, t_s = lib.response_at(LAM)
    sf = optics.site_fields(t_l[dec.cell], t_s[dec.cell], dec.rotation_rad,
                            optics.input_jones("design", design_sigma=design.sigma), sigma=design.sigma)
    x, y = optics.site_xy(dec)
    k = 2 * np.pi / (LAM * 1e-3)
    ax = np.exp(-1j * k * np.outer(u, x))            # (nu, S)
    ay = np.exp(-1j * k * np.outer(v, y))            # (nv, S)
    return (ay * sf.designed.astype(np.complex128)[None, :]) @ ax.T, float(np.abs(sf.designed).sum())


@pytest.fixture(scope="module")
def tilt_mask(tmp_path_factory):
    design = _design([{"kind": "tilt", "angle_deg": 3.0, "azimuth_deg": 30.0}], 24.0)
    path = _mask_from_design(tmp_path_factory.mktemp("tilt"), design, "tilt.gds")
    return path, design


def test_block_far_field_within_its_bound_and_bound_not_vacuous(tilt_mask):
    # Equivalence check: streamed block far field vs the exact whole-mask site sum, within the derived bound;
    # Source (bound): |exp(-i phi) - 1 + i phi| <= phi^2/2 and |exp(-i phi) - 1| <= |phi| (Taylor remainder of the
    # exponential, Abramowitz & Stegun 4.2.1), phi <= pi B (|u| + |v|) / lambda for |dx|, |dy| <= B/2.
    path, design = tilt_mask
    lib = make_library()
    target = optics.target_from_design(design)
    errors, bounds, tight = {}, {}, {}
    for order in (0, 1):
        for m in (1, 3, 7):
            res = check_optics_streamed(path, lib, design=design, block_um=m * P_NM * 1e-3, order=order,
                                        chunk_polygons=700)
            ff = res.far["designed"]
            rows, cols = slice(None), slice(None)
            ref, a_sum = exact_site_sum(path, lib, design, ff.u[cols], ff.v[rows])
            # the cell-aperture factor of a uniformly filled p x p cell (Goodman 2005, ch. 4: rect -> sinc)
            ref = ref * np.outer(np.sinc(P_NM * ff.v[rows] / LAM), np.sinc(P_NM * ff.u[cols] / LAM))
            assert ff.amplitude_sum == pytest.approx(a_sum, rel=1e-6)
            err = np.abs(ff.field[rows, cols] - ref)
            assert np.all(err <= ff.bound[rows, cols]), (order, m)
            errors[order, m] = float(err.max()) / a_sum
            bounds[order, m] = float(ff.bound[rows, cols].max()) / a_sum
            tight[order, m] = float((err / ff.bound[rows, cols]).max())  # 1 = the bound is reached
            # the spot fraction: streamed vs exact at the same samples, within the stated power bound
            inside = ((ff.u[cols][None, :] - target.direction[0]) ** 2
                      + (ff.v[rows][:, None] - target.direction[1]) ** 2 < res.figures["lobe_radius_u"] ** 2)
            norm = ff.du * ff.dv * (P_NM * 1e-3) ** 2 / ((LAM * 1e-3) ** 2 * res.figures["decode"]["sites"])
            eta_exact = float((np.abs(ref[inside]) ** 2).sum() * norm)
            assert abs(res.figures["designed_spot_efficiency"] - eta_exact) <= \
                res.figures["designed_spot_efficiency_bound"] + 1e-12
    for order in (0, 1):  # coarser blocks: a larger measured error, still inside a larger bound
        assert errors[order, 1] < errors[order, 3] < errors[order, 7]
        assert bounds[order, 1] < bounds[order, 3] < bounds[order, 7]
        # not vacuous: somewhere in the window the measured error reaches ~1-3 % (order 0: first-order errors of
        # a symmetric block largely cancel, the bound does not assume it) and ~30-50 % (order 1) of the bound
        # (measured 0.014 / 0.027 and 0.49 / 0.33 for 3 and 7 periods)
        assert min(tight[order, 3], tight[order, 7]) > (0.007 if order == 0 else 0.2)
    assert errors[1, 7] < errors[0, 7]  # the first moments help


def test_streamed_power_budget_equals_whole_mask_check(tilt_mask):
    # Equivalence check with the whole-mask optical check: the power budget is an exact sum in both
    path, design = tilt_mask
    lib = make_library(t_long=0.9 + 0.2j, t_short=-0.7 + 0.1j)
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False))
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=500)
    pw, ps = whole.figures["power_budget"], res.figures["power_budget"]
    assert pw["empty_cells"] == 0
    for key in ("converted", "leakage", "designed_polarization", "other_polarization"):
        assert ps[key] == pytest.approx(pw[key], rel=1e-6), key
    assert res.figures["method"] == "streamed block far field"
    assert res.figures["block"]["block_um"] > 0 and "phi" in res.figures["error_bound"]["field"]
    # the designed spot (whole check: padded FFT with the cell aperture factor; here: block sums, no cell factor)
    # Common practice (no source): the two samplings agree to about 2 % of the incident power for a 3 deg tilt
    assert res.figures["designed_spot_efficiency"] == pytest.approx(whole.figures["designed_spot_efficiency"],
                                                                    abs=0.02)
    assert res.figures["verdicts"]["verdict"] in ("pass", "warn", "fail")
    assert any(i["key"] == "converted_efficiency" for i in res.figures["verdicts"]["items"])


@pytest.mark.parametrize("levels", [2, 4, 8])
def test_streamed_blazed_grating_efficiency_swanson(tmp_path, levels):
    # Source: Swanson 1989, MIT Lincoln Laboratory Technical Report 854, "Binary optics technology": first-order
    # efficiency of an N-level staircase approximation of a blazed grating is sinc^2(1/N).
    n = 128
    ii, jj = square_sites(n)
    per_level = 2 if levels == 2 else 1
    theta = np.mod(np.pi * np.mod(ii // per_level, levels) / levels, np.pi)
    path = write_fins_gds(tmp_path / "grating.gds", ii * P_NM, jj * P_NM, theta)
    u_design = LAM / (levels * per_level * P_NM)
    target = optics.OpticsTarget(wavelength_nm=LAM, sigma=1, charge=None, direction=(u_design, 0.0))
    res = check_optics_streamed(path, make_library(), target=target, block_um=P_NM * 1e-3, pad_factor=1.0,
                                chunk_polygons=3000)
    eff = res.figures["far_field"]["fractions_of_incident"]["designed"]
    bound = res.figures["far_field"]["bounds_of_fractions"]["designed"]
    # tolerance 1e-3 (1 nm snapping: < 0.5 deg of phase) plus the block bound (zero here: one site per block)
    assert bound < 1e-9
    assert eff == pytest.approx(np.sinc(1.0 / levels) ** 2, abs=1e-3 + bound)


def test_accumulator_tiles_in_any_order_and_the_convention():
    # A +x phase gradient exp(i k u0 x) sends light to +u (Goodman 2005, ch. 4: plane-wave decomposition); the
    # result does not depend on how sites are split into tiles (block sums are additive): equivalence check.
    p = 0.4
    ii, jj = np.meshgrid(np.arange(-40, 40), np.arange(-40, 40))
    x, y = ii.ravel() * p, jj.ravel() * p
    u0 = 0.2
    f = np.exp(1j * 2 * np.pi / 0.633 * u0 * x)
    one = FarFieldAccumulator(3 * p, 633.0)
    one.add(x, y, f)
    many = FarFieldAccumulator(3 * p, 633.0)
    rng = np.random.default_rng(0)
    for part in np.array_split(rng.permutation(x.size), 7):
        many.add(x[part], y[part], f[part])
    du = 0.633 / (2 * one.extent_um[0])
    a, b = one.window(0.0, 0.0, du, du, 25), many.window(0.0, 0.0, du, du, 25)  # |u| < 0.25 < lambda / 2B
    assert np.allclose(a.field, b.field, rtol=0, atol=1e-9 * a.amplitude_sum)
    iv, iu = np.unravel_index(np.argmax(np.abs(a.field)), a.field.shape)
    assert a.u[iu] == pytest.approx(u0, abs=a.du) and abs(a.v[iv]) <= a.dv
    assert a.u[iu] > 0  # a flipped sign convention would put the peak at -u0
    # a carrier at the spot moves the same far field to the window about u0 (demodulation is exact)
    c = FarFieldAccumulator(3 * p, 633.0, carrier=(u0, 0.0))
    c.add(x, y, f)
    w0 = c.window(u0, 0.0, du, du, 3)
    assert np.abs(w0.field).max() == pytest.approx(np.abs(f).sum(), rel=1e-9)  # all in phase at u0
    assert np.all(np.abs(w0.field - one.window(u0, 0.0, du, du, 3).field) <= w0.bound + a.bound.max())


def test_bound_formula_and_bad_settings():
    from metalay.errors import MetalayError

    # order 1: A phi^2/2 with phi = pi B (|u| + |v|)/lambda for offsets up to B/2 (+1e-12 A)
    phi = math.pi * 1.0 * (0.1 + 0.05) / 0.5
    assert phase_bound(0.1, -0.05, 0.5, 0.5, 500.0, 1, 2.0) == pytest.approx(2.0 * (phi * phi / 2 + 1e-12))
    assert phase_bound(0.1, -0.05, 0.5, 0.5, 500.0, 0, 2.0) == pytest.approx(2.0 * (phi + 1e-12))
    assert phase_bound(3.0, 3.0, 0.5, 0.5, 500.0, 0, 1.0) == pytest.approx(2.0 + 1e-12)  # |exp(i a) - 1| <= 2
    with pytest.raises(MetalayError, match="order"):
        FarFieldAccumulator(1.0, 500.0, order=2)
    with pytest.raises(MetalayError, match="block_um"):
        FarFieldAccumulator(0.0, 500.0)


def test_cli_streamed_optics_writes_figures_bound_and_caution(tmp_path, capsys):
    import json

    from metalay.api import compile_design
    from metalay.cli import main
    from metalay.design.spec import load_design

    from conftest import SMALL_DESIGN, write_toml

    toml = write_toml(tmp_path / "d.toml", dict(SMALL_DESIGN, mask={"formats": ["gds"]}))
    gds = compile_design(load_design(toml), tmp_path / "c", show_progress=False).files["gds"]
    assert main(["optics", str(gds), "--design", str(toml), "--streamed", "-o", str(tmp_path / "o")]) == 0
    cap = capsys.readouterr()
    text = cap.out
    assert "method: streamed block far field" in text and "block-sum error bound" in text
    assert "OAM purity of charge" in text  # the vortex's spectrum is measured when streaming, with its bound
    assert "design aid" in cap.err  # the one-line caution goes to standard error
    f = json.loads((tmp_path / "o" / "optics.json").read_text())
    assert f["method"] == "streamed block far field" and "design aid" in f["caution"]
    assert 0 <= f["designed_spot_efficiency_bound"] < 0.05  # the default block keeps the bound small
    assert "design aid" in (tmp_path / "o" / "optics_report.html").read_text()
    # Common practice (no source): a geometric-phase vortex + tilt of this library converts ~97 % and sends most of
    # it into the designed lobe (the whole-mask check gives 0.83 on a larger aperture of the same design)
    assert f["far_field"]["fractions_of_incident"]["designed"] > 0.5


# ---------------------------------------------------------------------------------------------------------------
# OAM spectrum, crosstalk and lens figures of the streamed check
# ---------------------------------------------------------------------------------------------------------------

def _sites(path, lib, sigma=1):
    """Sites of the mask read whole, with their designed and converted fields (the whole-mask check's stages)."""
    flat = read_mask(path, layers=[(1, 0)])
    dec = decode_sites(flat, lib.cells, period_nm=P_NM, lattice="square")
    t_l, t_s = lib.response_at(LAM)
    sf = optics.site_fields(t_l[dec.cell], t_s[dec.cell], dec.rotation_rad,
                            optics.input_jones("design", design_sigma=sigma), sigma=sigma)
    x, y = optics.site_xy(dec)
    return x, y, sf


def _vortex_mask(tmp_path, charge, levels=None, diameter_um=40.0, name="v.gds"):
    """A charge-``charge`` geometric-phase vortex (theta = l phi / 2, design spin +1), its phase optionally
    quantised to ``levels`` steps per 2 pi (written with the test fixture writer, not the compiler)."""
    from metalay.design.lattice import sample_sites

    design = _design([{"kind": "vortex", "charge": charge}], diameter_um)
    s = sample_sites(design.aperture, design.lattice)
    phase = charge * np.arctan2(s.y_um, s.x_um)
    if levels:
        phase = 2 * np.pi / levels * np.round(phase * levels / (2 * np.pi))
    return write_fins_gds(tmp_path / name, s.x_um * 1e3, s.y_um * 1e3, np.mod(phase / 2, np.pi)), design


def test_streamed_oam_spectrum_against_whole_check_and_staircase_closed_form(tmp_path):
    lib = make_library()
    path, design = _vortex_mask(tmp_path, 2, levels=4)
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False))
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=900)
    o, w = res.figures["oam"], whole.figures["oam"]
    weights = dict(zip(o["charges"], o["weights"]))
    # Source: Fourier series of an N-step staircase of exp(i l phi) (the same sum as Swanson 1989, MIT Lincoln Lab.
    # TR 854, for N-level gratings): weight sinc^2(1/N) at l and sinc^2(1/N - 1) at l (1 - N); N = 4, l = +2:
    # 0.8106 at +2 and 0.0901 at -6 (a flipped charge sign puts them at -2 and +6).
    assert weights[2] == pytest.approx(np.sinc(0.25) ** 2, abs=0.01)
    assert weights[-6] == pytest.approx(np.sinc(0.75) ** 2, abs=0.01)
    assert weights[-2] < 0.01 and weights[6] < 0.01  # (measured 0.003: few sites on the innermost rings)
    # equivalence with the whole-mask check (interpolated polar grid vs ring quadrature of the sites)
    # Common practice (no source): the two quadratures of the same spectrum agree to 0.01
    assert o["purity"] == pytest.approx(w["purity"], abs=0.01)
    assert np.allclose(o["weights"], w["weights"], atol=0.01)
    assert 0 < o["purity_bound"] < 1e-3 and "sectors" in o["method"]
    assert any(i["key"] == "oam_purity" and i["verdict"] != "unmeasured" for i in res.figures["verdicts"]["items"])


def test_streamed_oam_weights_within_bound_of_exact_ring_sums(tmp_path):
    # Independent calculation: the ring quadrature P_l = sum_k |sum_ring g_s exp(-i l phi_s)|^2 / N_k with the
    # exact site angles (no sectors); the streamed sums must agree within their stated bound, which is not vacuous.
    lib = make_library(t_long=0.9 + 0.1j, t_short=-0.8 + 0.2j)
    path, design = _vortex_mask(tmp_path, -3, diameter_um=30.0)
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=700)
    o = res.figures["oam"]
    x, y, sf = _sites(path, lib)
    r, phi = np.sqrt(x * x + y * y), np.arctan2(y, x)
    ring = (r / (P_NM * 1e-3)).astype(int)  # the check's ring of each site (sites on a ring's edge: same side)
    keep = ring < o["rings"]
    g = sf.converted.astype(np.complex128)[keep]
    ring, phi = ring[keep], phi[keep]
    n_k = np.bincount(ring, minlength=o["rings"])
    exact = []
    for lq in o["charges"]:
        h = np.bincount(ring, (g * np.exp(-1j * lq * phi)).real, o["rings"]) + \
            1j * np.bincount(ring, (g * np.exp(-1j * lq * phi)).imag, o["rings"])
        exact.append(float((np.abs(h) ** 2 / np.maximum(n_k, 1)).sum() / (np.abs(g) ** 2).sum()))
    err = np.abs(np.array(o["weights"]) - exact)
    assert np.all(err <= np.array(o["weight_bounds"]) + 1e-12)
    assert o["purity"] > 0.98 and dict(zip(o["charges"], o["weights"]))[3] < 1e-3  # sign: -3, not +3
    assert err.max() > 1e-3 * max(o["weight_bounds"])  # the bound is not vacuous


def test_streamed_crosstalk_equals_whole_check_and_is_diagonal(tmp_path):
    # Source: Mair et al. 2001, Nature 412, 313: only the matching conjugate vortex gives an on-axis spot; the
    # whole-mask check's matrix is the same site sum (equivalence check to rounding).
    chans = [{"charge": q, "angle_deg": 3.0, "azimuth_deg": az} for q, az in ((-3, 0), (-1, 90), (2, 180), (4, 270))]
    design = _design([{"kind": "multiplex", "channels": chans}], 40.0)
    path = _mask_from_design(tmp_path, design, "mux.gds")
    lib = make_library()
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False))
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=1000)
    ct, cw = res.figures["crosstalk"], whole.figures["crosstalk"]
    assert np.allclose(ct["matrix"], cw["matrix"], rtol=1e-9, atol=1e-12)
    assert ct["worst_isolation_db"] == pytest.approx(cw["worst_isolation_db"], abs=1e-6)
    mat = np.array(ct["matrix"])
    assert np.all(np.argmax(mat, axis=1) == np.arange(4))  # a flipped probe or direction sign breaks this
    assert ct["worst_isolation_db"] > 10.0
    assert any(i["key"] == "worst_isolation_db" for i in res.figures["verdicts"]["items"])


def test_streamed_lens_against_airy_whole_check_and_exact_focal_sums(tmp_path):
    from metalay.checks._stream_figures import focal_model_bound, rs_kernel

    design = _design([{"kind": "lens", "focal_length_um": 200.0}], 50.0)
    path = _mask_from_design(tmp_path, design, "lens.gds")
    lib = make_library()
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False))
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=2000)
    lm, lw = res.figures["lens"], whole.figures["lens"]
    # Source: Born & Wolf, Principles of Optics, 7th ed., sec. 8.5.2: Airy first zero 1.22 lambda f / D
    # (paraxial; 0.61 lambda / NA), FWHM 0.514 lambda / NA; sec. 9.1: Strehl ratio 1 without aberration
    d_um = lm["diameter_um"]
    assert lm["first_dark_ring_um"] == pytest.approx(1.22 * LAM * 1e-3 * 200.0 / d_um, rel=0.03)
    assert lm["fwhm_x_um"] == pytest.approx(lm["fwhm_airy_um"], rel=0.03)
    assert lm["fwhm_y_um"] == pytest.approx(lm["fwhm_airy_um"], rel=0.03)
    assert lm["strehl"] == pytest.approx(1.0, abs=0.02) and lm["strehl_bound"] < 0.02
    # equivalence with the whole-mask check (angular spectrum of the sampled near field)
    # Common practice (no source): two propagations of the same mask agree to 2 % in width and Strehl ratio
    for key in ("fwhm_x_um", "first_dark_ring_um"):
        assert lm[key] == pytest.approx(lw[key], rel=0.02), key
    assert lm["strehl"] == pytest.approx(lw["strehl"], abs=0.02)
    assert lm["focusing_efficiency"] == pytest.approx(lw["focusing_efficiency"], abs=0.03)
    # Independent calculation: the Rayleigh-Sommerfeld sum over every site at focal-plane points, against the
    # streamed window within its stated bound (moduli: the streamed field drops a common phase)
    ff = res.far["focal_plane"]
    x, y, sf = _sites(path, lib)
    k = 2 * np.pi / (LAM * 1e-3)
    pick = [(60, 60), (60, 75), (70, 52), (30, 90), (0, 0), (120, 64)]
    for r, c in pick:
        px, py = 200.0 * ff.u[c], 200.0 * ff.v[r]
        h, _ = rs_kernel(px - x, py - y, 200.0, k)
        exact = abs(np.sum(sf.designed.astype(np.complex128) * h) * (P_NM * 1e-3) ** 2)
        eps = ff.bound[r, c] + ff.amplitude_sum * float(focal_model_bound(np.hypot(px, py), 200.0, k,
                                                                          lm["largest_sin_from_focus"]))
        assert abs(abs(ff.field[r, c]) - exact) <= eps, (r, c)
    assert any(i["key"] == "strehl" and i["verdict"] != "unmeasured" for i in res.figures["verdicts"]["items"])


def test_streamed_lens_sign_diverging_mask_and_tilted_focus(tmp_path):
    from metalay.design.lattice import sample_sites
    from metalay.design.phase import target_phase

    lib = make_library()
    design = _design([{"kind": "lens", "focal_length_um": 150.0}, {"kind": "tilt", "angle_deg": 2.0}], 40.0)
    s = sample_sites(design.aperture, design.lattice)
    phi = target_phase(design.terms, s.x_um, s.y_um, wavelength_nm=LAM, sigma=1)
    good = write_fins_gds(tmp_path / "good.gds", s.x_um * 1e3, s.y_um * 1e3, np.mod(phi / 2, np.pi))
    bad = write_fins_gds(tmp_path / "bad.gds", s.x_um * 1e3, s.y_um * 1e3, np.mod(-phi / 2, np.pi))
    lg = check_optics_streamed(good, lib, design=design).figures["lens"]
    lb = check_optics_streamed(bad, lib, design=design).figures["lens"]
    # Source: Goodman 2005, ch. 5 (a converging phase -k (sqrt(r^2 + f^2) - f) focuses at f; its conjugate
    # diverges): the spin-flipped mask has no focus, so a flipped kernel sign would swap the two
    assert lg["strehl"] > 0.9 and lb["strehl"] < 0.1
    # Source: grating equation (Born & Wolf, sec. 8.6.1): the tilt moves the focus to f tan(2 deg) along +x
    step = lg["airy_radius_um"] * 3 / 60
    assert lg["peak_position_um"][0] == pytest.approx(150.0 * np.tan(np.radians(2.0)), abs=1.5 * step)
    assert abs(lg["peak_position_um"][1]) <= 1.5 * step


def test_blocks_merged_when_the_mask_outgrows_the_grid_equal_direct_coarse_blocks():
    # Equivalence check: merging 3 x 3 blocks as the grid outgrows max_side gives the block sums and first moments
    # of accumulating at the coarse side directly (block sums are additive; M' = sum (M + S (X_b - X')) exactly)
    p = 0.4
    ii, jj = np.meshgrid(np.arange(-60, 61), np.arange(-60, 61))
    x, y = ii.ravel() * p, jj.ravel() * p
    f = np.exp(1j * 2 * np.pi / 0.633 * (0.05 * x - 0.02 * y)) * (1 + 0.1 * np.cos(x))
    merged = FarFieldAccumulator(p, 633.0, max_side=20)
    for part in np.array_split(np.arange(x.size), 9):  # rows arrive band by band, the grid grows and merges
        merged.add(x[part], y[part], f[part])
    assert merged.block_um == pytest.approx(9 * p) and max(merged.grids[0].shape) <= 20
    direct = FarFieldAccumulator(9 * p, 633.0)
    direct.add(x, y, f)
    assert merged.grids[0].shape == direct.grids[0].shape
    for g_m, g_d in zip(merged.grids, direct.grids):
        assert np.allclose(g_m, g_d, rtol=0, atol=1e-9 * np.abs(f).sum())
    assert merged.reach_x_um >= direct.reach_x_um  # the merged bound uses offsets at least as large
    du = 0.633 / (2 * direct.extent_um[0])
    a, b = merged.window(0.0, 0.0, du, du, 6), direct.window(0.0, 0.0, du, du, 6)
    assert np.allclose(a.field, b.field, rtol=0, atol=1e-9 * a.amplitude_sum) and np.all(a.bound >= b.bound)


def test_read_ahead_keeps_order_raises_reader_errors_and_stops():
    from metalay.checks.optics_stream import prefetch
    from metalay.errors import MetalayError

    assert list(prefetch(iter(range(50)), depth=2)) == list(range(50))

    def failing():
        yield 1
        raise MetalayError("mask.gds: record 7 truncated")

    with pytest.raises(MetalayError, match="truncated"):
        list(prefetch(failing()))
    seen = []
    gen = prefetch(iter(range(10_000)), depth=1)
    for v in gen:
        seen.append(v)
        if v == 3:
            break
    gen.close()  # leaving early stops the reader thread (joined in the generator's finally)
    import threading

    assert seen == [0, 1, 2, 3] and not any(t.name == "mask-reader" for t in threading.enumerate())


@pytest.mark.parametrize("lattice", ["square", "hexagonal"])
def test_lattice_phasor_equals_direct_exponential_at_site_positions(lattice):
    # Independent calculation: exp(-i k (u x + v y)) evaluated directly at optics.site_xy positions (both lattices,
    # negative rows as in a mirrored beam frame); the row/column tables must give the same values
    from types import SimpleNamespace

    from metalay.checks._stream_figures import lattice_phasor

    rng = np.random.default_rng(5)
    dec = SimpleNamespace(i=rng.integers(-900, 900, 5000), j=rng.integers(-900, 900, 5000), period_nm=400.0,
                          lattice=lattice, origin_um=(0.13, -0.07))
    x, y = optics.site_xy(dec)
    k = 2 * np.pi / 0.633
    direct = np.exp(-1j * k * (0.31 * x - 0.12 * y))
    assert np.allclose(lattice_phasor(dec, 0.31, -0.12, k), direct, rtol=0, atol=1e-10)


def test_bad_polygon_mid_stream_is_one_error_and_stops_the_reader(tmp_path):
    # Common practice (no source): bad input gives one error naming the file, and no reader thread is left running
    import threading

    import gdstk

    from metalay.errors import MetalayError

    ii, jj = square_sites(40)
    good = write_fins_gds(tmp_path / "g.gds", ii * P_NM, jj * P_NM, np.zeros(ii.size))
    lib_g = gdstk.read_gds(str(good))
    lib_g.cells[0].add(gdstk.Polygon([(30.0, 30.0), (30.2, 30.0), (30.1, 30.2)], layer=1, datatype=0))
    bad = tmp_path / "bad.gds"
    lib_g.write_gds(str(bad))
    target = optics.OpticsTarget(wavelength_nm=LAM, sigma=1, charge=3)
    with pytest.raises(MetalayError, match=r"bad\.gds: polygons 1600-1600 .*3 vertices"):
        check_optics_streamed(bad, make_library(), target=target, chunk_polygons=200)
    assert not any(t.name == "mask-reader" for t in threading.enumerate())


# ---------------------------------------------------------------------------------------------------------------
# Fringe reading of the streamed check: block means of the converted near field, then the whole-mask reading
# ---------------------------------------------------------------------------------------------------------------

def _fringe_item(figures):
    return next(i for i in figures["verdicts"]["items"] if i["key"] == "fringe_charge")


@pytest.mark.parametrize("terms, charge", [
    ([{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}], 3),
    ([{"kind": "vortex", "charge": -2}], -2),
    ([{"kind": "vortex", "charge": 1}, {"kind": "tilt", "angle_deg": 3.0, "azimuth_deg": 60.0}], 1),
    ([{"kind": "lens", "focal_length_um": 200.0}], 0),
], ids=["+3-tilt", "-2", "+1-tilt-az60", "lens"])
def test_streamed_fringe_reading_equals_whole_check(tmp_path, terms, charge):
    # Source: Heckenberg et al. 1992, Opt. Quantum Electron. 24, S951: a charge-l vortex against a tilted plane
    # wave makes a fork with |l| extra fringes (none for a lens: charge 0); read by the whole-mask check's own
    # interferogram and reading (Takeda, Ina & Kobayashi 1982), so the streamed reading must equal it.
    lib = make_library()
    design = _design(terms, 40.0)
    path = _mask_from_design(tmp_path, design, "m.gds")
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False)).figures
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=900)
    fr, wr = res.figures["fringe_reading"], whole["fringe_reading"]
    assert wr["status"] == "read" and wr["charge"] == charge  # the reference reads the design's charge
    assert fr["status"] == "read" and fr["charge"] == wr["charge"] == charge and fr["agrees"]
    assert np.allclose(fr["windings"], charge, atol=0.05)
    # blocks of one cell on this small mask: the grid covers the aperture about the axis, no site left out
    assert fr["block_cells"] == [1, 1] and fr["sites_outside_grid"] == 0
    assert fr["vortex_phase_across_block_rad"] <= fr["max_phase_across_block_rad"]
    # same verdict item as the whole-mask check (same thresholds: optics_verdicts)
    assert _fringe_item(res.figures) == _fringe_item(whole)
    img, x, y = res.fringe_image
    assert img.shape == (y.size, x.size) and np.all(np.isfinite(img))


def test_streamed_fringe_reading_sign_with_blocks_of_several_cells(tmp_path, monkeypatch):
    # Blocks of 4 x 4 cells (as at 1e7 sites: the grid is at most 512 blocks per side) on a charge -2 vortex with a
    # 4 degree tilt: the reading is -2 (a flipped reading gives +2). Flipping the sign of the removed tilt leaves
    # a residual tilt of 8 degrees that the blocks alias: the reading then is +2, so this test fails if the removed
    # phase's sign is flipped. Source: Heckenberg et al. 1992 (fork: the sign of l from the fork's direction).
    from metalay.checks import _stream_figures as sfig

    lib = make_library()
    design = _design([{"kind": "vortex", "charge": -2}, {"kind": "tilt", "angle_deg": 4.0}], 60.0)
    path = _mask_from_design(tmp_path, design, "m.gds")
    monkeypatch.setattr(sfig, "FRINGE_MAX_BLOCKS", 64)
    fr = check_optics_streamed(path, lib, design=design, chunk_polygons=2000).figures["fringe_reading"]
    assert fr["block_cells"] == [4, 4] and fr["grid"][0] <= 64
    assert fr["status"] == "read" and fr["charge"] == -2
    removal = sfig._linear_removal
    monkeypatch.setattr(sfig, "_linear_removal", lambda t: tuple(-c for c in removal(t)))
    flipped = check_optics_streamed(path, lib, design=design, chunk_polygons=2000).figures["fringe_reading"]
    assert flipped["charge"] != -2


def test_streamed_fringe_unreadable_when_the_blocks_do_not_resolve_the_fork(tmp_path, monkeypatch):
    # Source (derived): the reading keeps the spectrum within f_c / 2 = 1 / (12 B) of the carrier (6 blocks per
    # fringe; Takeda, Ina & Kobayashi 1982), and a charge-l vortex has the local frequency |l| / (2 pi r) on a loop
    # of radius r: beyond |l| B / r = pi / 6 the reading is refused ("unreadable", a warning), never a number.
    # Measured here: 10 x 10 cells per block would read charge 3 as 1.
    from metalay.checks import _stream_figures as sfig

    lib = make_library()
    design = _design([{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 4.0}], 40.0)
    path = _mask_from_design(tmp_path, design, "m.gds")
    monkeypatch.setattr(sfig, "FRINGE_MAX_BLOCKS", 16)
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=900)
    fr = res.figures["fringe_reading"]
    assert fr["vortex_phase_across_block_rad"] > math.pi / 6
    assert fr["status"] == "unreadable" and fr["charge"] is None and "not resolved" in fr["reason"]
    item = _fringe_item(res.figures)
    assert item["verdict"] == "warn" and "not resolved" in item["text"]


def test_streamed_fringe_verdict_fails_when_the_mask_charge_differs_from_the_design(tmp_path):
    # A charge-2 mask checked against a charge-3 design: both checks read 2 and fail the same verdict item
    # (metalay.checks.optics.optics_verdicts: pass only when the read charge equals the design's).
    # Source: Heckenberg et al. 1992 (the fork shows the mask's charge, whatever the design says).
    lib = make_library()
    path, _ = _vortex_mask(tmp_path, 2, diameter_um=40.0)
    design = _design([{"kind": "vortex", "charge": 3}], 40.0)
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False)).figures
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=900)
    assert res.figures["fringe_reading"]["charge"] == whole["fringe_reading"]["charge"] == 2
    item = _fringe_item(res.figures)
    assert item == _fringe_item(whole) and item["verdict"] == "fail" and res.figures["verdicts"]["verdict"] == "fail"


def test_streamed_fringe_reading_hexagonal_lattice(tmp_path):
    # Hexagonal blocks of whole rows (every block holds the same number of cells) read the whole-mask charge.
    # Source: Heckenberg et al. 1992 (fork of a charge-3 vortex: 3 extra fringes).
    lib = make_library()
    design = _design([{"kind": "vortex", "charge": 3}, {"kind": "tilt", "angle_deg": 3.0}], 40.0,
                     lattice="hexagonal")
    path = _mask_from_design(tmp_path, design, "h.gds")
    whole = optics.check_optics(path, lib, design=design, options=optics.OpticsOptions(make_plots=False)).figures
    fr = check_optics_streamed(path, lib, design=design, chunk_polygons=900).figures["fringe_reading"]
    assert fr["status"] == "read" and fr["charge"] == whole["fringe_reading"]["charge"] == 3


def test_fringe_blocks_hold_whole_cells_and_cover_the_aperture():
    # Common practice (no source): block means over whole lattice cells; every block inside the aperture holds
    # mx x my sites; at most max_blocks per side; the axis at a block centre.
    from types import SimpleNamespace

    from metalay.checks import _stream_figures as sfig

    p = 0.4
    for lattice in ("square", "hexagonal"):
        acc = sfig.fringe_blocks((1.3, -0.7), (30.0, 20.0), p, lattice, 633.0, max_blocks=40)
        assert max(acc.nx, acc.ny) <= 40 and acc.nx % 2 == 1 and acc.ny % 2 == 1
        i, j = np.meshgrid(np.arange(-90, 91), np.arange(-70, 71))
        dec = SimpleNamespace(i=i.ravel(), j=j.ravel(), origin_um=(0.0, 0.0), lattice=lattice, period_nm=p * 1e3)
        acc.add(dec, np.ones(i.size, complex))
        fld, x, y = acc.field(p)
        xs, ys = optics.site_xy(SimpleNamespace(**vars(dec)))
        inner = (np.abs(x[None, :]) < 30.0) & (np.abs(y[:, None]) < 20.0)
        assert np.allclose(fld[inner], 1.0)  # whole blocks: mean of mx x my unit fields
        assert acc.sites_in + acc.sites_out == i.size and acc.sites_in > 0
        cx = x[acc.nx // 2]
        cy = y[acc.ny // 2]
        assert abs(cx - 1.3) <= (x[1] - x[0]) / 2 + 1e-9 and abs(cy + 0.7) <= (y[1] - y[0]) / 2 + 1e-9
        assert x[0] <= -30.0 + (x[1] - x[0]) and x[-1] >= 30.0 - (x[1] - x[0]) and xs.size == i.size


def test_compile_that_streams_its_optics_shows_the_fringe_reading(tmp_path, monkeypatch, small_design_dict):
    # A compile told to stream (the threshold STREAM_CHECKS_ABOVE_SITES and the fixed part lowered so that this
    # small mask streams, as one above 4e6 sites does): manifest, optics.json, the streamed report and the compile
    # report carry the reading. Source: Heckenberg et al. 1992 (charge-3 fork: 3 extra fringes).
    import json

    from metalay.api import compile_design
    from metalay.checks import steps
    from metalay.design.spec import parse_design

    monkeypatch.setattr(steps, "STREAM_CHECKS_ABOVE_SITES", 0)
    monkeypatch.setattr(steps, "STREAMED_FIXED_BYTES", 0)
    raw = small_design_dict
    raw["mask"]["formats"] = ["gds"]
    raw["checks"] = {"rules": False, "optics": True}
    res = compile_design(parse_design(raw), tmp_path / "c", show_progress=False)
    opt = res.manifest["checks"]["optics"]
    assert opt["method"]["method"] == "streamed block far field"
    assert opt["figures"]["fringe_reading"]["charge"] == 3 and "fringe charge 3" in opt["summary"]
    assert any(i["key"] == "fringe_charge" and i["verdict"] == "pass" for i in opt["verdict_items"])
    folder = tmp_path / "c"
    written = {Path(f["path"]).name for f in opt["files"].values()}
    assert {"optics.json", "interferogram.png", "optics_report.html"} <= written
    on_disk = json.loads(next(folder.rglob("optics.json")).read_text())
    assert on_disk["fringe_reading"]["charge"] == 3
    html = next(folder.rglob("optics_report.html")).read_text()
    assert "charge read: 3" in html and "data:image/png;base64," in html
    assert "charge read from a simulated fork interferogram" in (folder / "report.html").read_text()


def test_streamed_fringe_sites_beyond_the_design_aperture_are_counted_and_said(tmp_path):
    # Common practice (no source): the fringe grid covers the design's aperture; a mask reaching beyond it has its
    # outer sites counted and named in the notes (never silently dropped); the reading inside still holds.
    lib = make_library()
    path, _ = _vortex_mask(tmp_path, 3, diameter_um=40.0)
    design = _design([{"kind": "vortex", "charge": 3}], 30.0)
    res = check_optics_streamed(path, lib, design=design, chunk_polygons=900)
    fr = res.figures["fringe_reading"]
    x, y, _ = _sites(path, lib)
    half = 15.0 + 2 * P_NM * 1e-3  # the grid reaches two cells beyond the aperture's half width
    beyond = int(np.count_nonzero((np.abs(x) > half + fr["block_um"][0]) | (np.abs(y) > half + fr["block_um"][1])))
    assert fr["sites_outside_grid"] >= beyond > 0
    assert any(f"{fr['sites_outside_grid']:,} sites beyond" in n for n in res.notes)
    assert fr["status"] == "read" and fr["charge"] == 3
