"""Log-polar mode sorter: the elements' phases against the paper's relations, fan-out gratings, optical check."""

import numpy as np
import pytest
from scipy import integrate

from metalay.errors import MetalayError
from metalay.measure import sorter

LAM = 532.0


def _uv(x, y, a, b):
    return -a * np.log(np.hypot(x, y) / b), a * np.arctan2(y, x)


def test_unwrapper_gradient_is_the_log_polar_map():
    # Source: Berkhout et al. 2010, Phys. Rev. Lett. 105, 153601: phi_1 is built so that its gradient sends the
    # ray through (x, y) to (u, v) = (-a ln(r/b), a theta) in the Fourier plane of a lens f, i.e.
    # grad phi_1 = (2 pi / (lambda f)) (u, v).  Checked by central differences (independent of the formula's
    # derivation), in all four quadrants and on both sides of the negative x axis.
    term = sorter.LogPolarUnwrapper(a_um=20.0, b_um=30.0, focal_length_mm=2.0)
    rng = np.random.default_rng(3)
    r = rng.uniform(10.0, 80.0, 200)
    t = rng.uniform(-np.pi + 0.02, np.pi - 0.02, 200)
    x, y = r * np.cos(t), r * np.sin(t)
    h = 1e-4
    gx = (term.phase(x + h, y, wavelength_nm=LAM, sigma=1) - term.phase(x - h, y, wavelength_nm=LAM, sigma=1)) / (2 * h)
    gy = (term.phase(x, y + h, wavelength_nm=LAM, sigma=1) - term.phase(x, y - h, wavelength_nm=LAM, sigma=1)) / (2 * h)
    u, v = _uv(x, y, 20.0, 30.0)
    k = 2 * np.pi / (LAM * 1e-3 * 2000.0)
    assert np.allclose(gx, k * u, rtol=1e-6, atol=1e-6) and np.allclose(gy, k * v, rtol=1e-6, atol=1e-6)
    # convention pin: half the points have x < 0, where arctan(y/x) read literally would give the folded
    # v = a arctan(y/x) instead of a atan2(y, x) and fail the y-gradient check above
    assert np.sum(x < 0) > 50


def test_corrector_cancels_the_stationary_phase():
    # Source: Berkhout et al. 2010: the corrector phi_2(u, v) = -(2 pi a b / (lambda f)) exp(-u/a) cos(v/a) removes
    # the phase left at (u, v) by the transformation, phi_1(x, y) - (2 pi / (lambda f)) (x u + y v) (the lens's
    # Fourier kernel at the stationary point): their sum must vanish identically.
    a, b, f_mm = 25.0, 40.0, 3.0
    rng = np.random.default_rng(4)
    r = rng.uniform(5.0, 100.0, 300)
    t = rng.uniform(-np.pi, np.pi, 300)
    x, y = r * np.cos(t), r * np.sin(t)
    u, v = _uv(x, y, a, b)
    p1 = sorter.LogPolarUnwrapper(a, b, f_mm).phase(x, y, wavelength_nm=LAM, sigma=1)
    p2 = sorter.LogPolarCorrector(a, b, f_mm).phase(u, v, wavelength_nm=LAM, sigma=1)
    kernel = 2 * np.pi / (LAM * 1e-3 * f_mm * 1e3) * (x * u + y * v)
    assert np.max(np.abs(p1 - kernel + p2)) < 1e-8 * np.max(np.abs(p1))


def test_gori_triplicator_and_iterative_fanout():
    # Source: Gori et al. 1998, Opt. Commun. 157, 13: the optimum phase triplicator arctan(2.65718 cos(2 pi x / d))
    # puts 0.9256 of the power into three equal orders.
    g3 = sorter.fanout_grating(3, 10.0)
    assert g3.efficiency == pytest.approx(0.9256, abs=2e-4)
    assert g3.uniformity < 1e-5
    # the stored profile reproduces those orders when sampled through the phase term (interpolation check)
    y = np.linspace(0, 10.0, 4096, endpoint=False)
    c = np.fft.fft(np.exp(1j * g3.phase(0 * y, y, wavelength_nm=LAM, sigma=1))) / y.size
    assert np.allclose(np.abs(c[[-1, 0, 1]]) ** 2, g3.efficiency / 3, atol=3e-3)
    assert np.allclose(np.angle(c[[-1, 0, 1]]), np.array(g3.order_phases_rad)[[0, 1, 2]], atol=0.02)
    # Common practice (no source): an iterative Fourier design reaches equal orders; efficiency measured here 0.921
    g5 = sorter.fanout_grating(5, 10.0)
    assert g5.uniformity < 1e-3 and g5.efficiency > 0.9


def test_window_fraction_matches_integral():
    # Source: Goodman 2005, Introduction to Fourier Optics, sec. 4.4.1 (sinc pattern of a uniform strip);
    # numerical quadrature as the independent value.
    for h in (0.5, 1.5, 2.5):
        ref = integrate.quad(lambda t: np.sinc(t) ** 2, -h, h, limit=200)[0]
        assert sorter.window_fraction_sinc2(h) == pytest.approx(ref, abs=1e-9)
    assert sorter.window_fraction_sinc2(0.5) == pytest.approx(0.7737, abs=1e-4)


def test_parameters_follow_the_paper_and_refuse_small_elements():
    # Source: Berkhout et al. 2010: a = d / (2 pi) maps the full azimuth onto the width d; spot displacement
    # lambda F l / (2 pi a) in the focal plane of the Fourier lens F.
    d = sorter.sorter_parameters(300.0, wavelength_nm=LAM, spot_spacing_um=20.0, period_nm=325.0)
    assert d.a_um == pytest.approx(300.0 / (2 * np.pi))
    assert d.spot_spacing_um == pytest.approx(20.0)
    assert d.corrector_waves >= 4.0 - 1e-3
    assert d.strip_x2_um[0] == pytest.approx(-d.strip_x2_um[1])  # b = sqrt(r_in r_out) centres the strip
    with pytest.raises(MetalayError, match="max_ray_angle_deg"):
        sorter.sorter_parameters(120.0, wavelength_nm=LAM, spot_spacing_um=20.0)
    with pytest.raises(MetalayError, match="period_nm"):
        sorter.sorter_parameters(300.0, wavelength_nm=LAM, spot_spacing_um=20.0, period_nm=1000.0)
    with pytest.raises(MetalayError, match="n_copies"):
        sorter.sorter_parameters(300.0, wavelength_nm=LAM, spot_spacing_um=20.0, n_copies=2)


def test_optical_check_spacing_sign_and_crosstalk():
    # Source: Berkhout et al. 2010: after the two elements an OAM state l is a plane wave with phase l v / a, so a
    # lens F focuses it to t = lambda F l / (2 pi a), linear in l (the paper separates l = -5..5 this way).
    # Tolerance: slope within 0.5 % and every spot within 2 % of a spacing (exact non-paraxial propagation of a
    # 4-wave corrector; measured 0.14 % and 0.4 %).  Sign: a phase growing along +y goes to +y (metalay.checks.grid),
    # so l > 0 lands at t_y > 0.
    d = sorter.sorter_parameters(300.0, wavelength_nm=LAM, spot_spacing_um=20.0, period_nm=325.0)
    chk = sorter.sorter_check(d, charges=range(-3, 4), sample_um=1.5)
    s = d.spot_spacing_um
    assert chk.slope_um == pytest.approx(s, rel=5e-3)
    assert np.max(np.abs(chk.positions_um - chk.predicted_um)) < 0.02 * s
    assert np.all(np.sign(chk.positions_um[chk.charges != 0]) == np.sign(chk.charges[chk.charges != 0]))
    # Crosstalk: diagonal-dominant (the paper reports the spots overlap but each is strongest in its window).
    # Reference for a uniform strip: sinc^2, 0.774 of the power within +-1/2 spacing (Goodman 2005, 4.4.1),
    # 0.80 of what the 7 windows collect; measured here 0.75-0.83, adjacent windows 0.10-0.13.
    xt = chk.crosstalk
    off = np.where(np.eye(xt.shape[0], dtype=bool), 0, xt)
    assert np.all(np.diag(xt) > 3 * off.max(axis=1))
    assert np.all(np.diag(xt) > 0.70)
    ideal = sorter.window_fraction_sinc2(0.5) / sorter.window_fraction_sinc2(3.5)
    assert abs(xt[3, 3] - ideal) < 0.08
    assert np.all(chk.detected > 0.75)


def test_fanout_copies_narrow_the_spots():
    # Source: O'Sullivan et al. 2012, Opt. Express 20, 24444: N side-by-side copies of the unwrapped beam make the
    # spots N times narrower at the same spacing, so more of each state stays in its own window.  Sign: the
    # copier's relay images the strip upside down (two Fourier transforms), so l > 0 lands at t_y < 0.
    kw = {"wavelength_nm": LAM, "spot_spacing_um": 20.0, "period_nm": 325.0}
    plain = sorter.sorter_check(sorter.sorter_parameters(300.0, **kw), charges=(-1, 0, 1), sample_um=1.5)
    three = sorter.sorter_check(sorter.sorter_parameters(300.0, n_copies=3, **kw), charges=(-1, 0, 1), sample_um=1.5)
    assert three.slope_um == pytest.approx(-20.0, rel=5e-3)
    assert three.positions_um[2] < 0 < three.positions_um[0]
    # measured: central diagonal 0.80 -> 0.90, neighbour leakage 0.10 -> 0.05 (window fractions, this geometry)
    assert three.crosstalk[1, 1] > plain.crosstalk[1, 1] + 0.05
    assert three.crosstalk[1, 0] < 0.7 * plain.crosstalk[1, 0]
    assert three.detected[1] > 0.8  # the triplicator passes 0.9256 of the power into the three copies


def test_bad_check_inputs():
    d = sorter.sorter_parameters(300.0, wavelength_nm=LAM, spot_spacing_um=20.0)
    with pytest.raises(MetalayError, match="beam"):
        sorter.sorter_check(d, charges=(0,), beam="donut", sample_um=3.0)
    with pytest.raises(MetalayError, match="max_side"):
        sorter.sorter_check(d, charges=(0,), sample_um=0.01)
    with pytest.raises(MetalayError, match="odd"):
        sorter.fanout_grating(4, 10.0)
