"""Far field, angular axes and angular-spectrum propagation against analytic results."""

import numpy as np
import pytest
from scipy import integrate, special

from metalay.checks import grid


def _disk(n, pitch_um, radius_um):
    x = grid.centered_axis(n, pitch_um)
    xx, yy = np.meshgrid(x, x)
    return x, xx, yy, (xx ** 2 + yy ** 2) <= radius_um ** 2


def _peak_u(ff):
    iy, ix = np.unravel_index(np.argmax(ff.power), ff.power.shape)
    # parabolic refinement of the peak along u (3 points)
    a, b, c = (float(ff.power[iy, ix + d]) for d in (-1, 0, 1))
    frac = 0.5 * (a - c) / (a - 2 * b + c)
    return ff.u[ix] + frac * ff.du, ff.v[iy]


def test_axes_centred_and_scaled():
    # zero at index n // 2 for even and odd n; spacing 1 / (n step)
    for n in (8, 9):
        f = grid.frequency_axis(n, 0.5)
        assert f[n // 2] == 0.0
        assert np.allclose(np.diff(f), 1.0 / (n * 0.5))
        assert grid.centered_axis(n, 0.5)[n // 2] == 0.0
    # direction cosine = wavelength x spatial frequency / n
    assert np.allclose(grid.direction_cosines(10, 0.3, 600.0), grid.frequency_axis(10, 0.3) * 0.6)
    assert np.allclose(grid.direction_cosines(10, 0.3, 600.0, medium_index=1.5),
                       grid.frequency_axis(10, 0.3) * 0.4)


def test_orientation_pin_plus_x_gradient_goes_to_plus_x():
    # Common practice (no source): exp(-i omega t) convention, a phase increasing along +x tilts the wave to +x.
    pitch = 0.325
    x, xx, yy, inside = _disk(128, pitch, 18.0)
    for sx, sy in ((1, 0), (0, 1), (-1, 0)):
        field = inside * np.exp(1j * 2 * np.pi * 0.2 / 0.532 * (sx * xx + sy * yy))
        ff = grid.far_field(field, pitch, pitch, 532.0)
        u, v = _peak_u(ff)
        assert np.sign(round(u, 3)) == sx and np.sign(round(v, 3)) == sy


def test_grating_equation_deflection():
    # Source: Born & Wolf, Principles of Optics, 7th ed., sec. 8.6.1, grating equation sin(theta) = lambda / Lambda
    # at normal incidence in air (first order).
    pitch, lam_nm = 0.325, 532.0
    for period_um in (2.6, 1.3, 4.0):
        x, xx, yy, inside = _disk(256, pitch, 40.0)
        field = inside * np.exp(2j * np.pi * xx / period_um)
        ff = grid.far_field(field, pitch, pitch, lam_nm, pad_factor=4)
        u, v = _peak_u(ff)
        # tolerance: a tenth of a far-field bin (parabolic peak refinement)
        assert abs(u - lam_nm * 1e-3 / period_um) < 0.1 * ff.du
        assert abs(v) < 1e-12


def test_parseval_without_cell_aperture_and_brillouin_loss_with_it():
    rng = np.random.default_rng(1)
    field = rng.normal(size=(37, 52)) + 1j * rng.normal(size=(37, 52))
    ff = grid.far_field(field, 0.3, 0.4, 633.0, cell_aperture=False)
    assert ff.power.sum() == pytest.approx(1.0, rel=1e-5)
    # with the cell aperture, a constant field keeps all power in the zero order: sum of sinc^2 over the
    # Brillouin zone for a uniform field equals the zero-order value 1 up to the aperture's tail
    ones = np.ones((64, 64))
    ff2 = grid.far_field(ones, 0.3, 0.3, 633.0, pad_factor=1)
    assert ff2.power.sum() == pytest.approx(1.0, rel=1e-6)


def test_vortex_ring_profile_matches_hankel_integral():
    # Source: Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 2.1.5 (Fourier-Bessel transform):
    # FT of circ(r/a) exp(i l phi) is 2 pi (-i)^l exp(i l psi) int_0^a J_l(2 pi rho r) r dr.
    pitch, a = 1.0, 48.0
    for charge in (0, 1, 3):
        x, xx, yy, inside = _disk(128, pitch, a)
        field = inside * np.exp(1j * charge * np.arctan2(yy, xx))
        ff = grid.far_field(field, pitch, pitch, 1000.0, pad_factor=4, cell_aperture=False)
        iy = ff.v.size // 2
        rho = ff.fx_per_um[ff.fx_per_um.size // 2:][:60]
        fft_profile = ff.power[iy, ff.fx_per_um.size // 2:][:60]
        hankel = np.array([integrate.quad(lambda r, p=p, charge=charge: special.jv(charge, 2 * np.pi * p * r) * r, 0, a,
                                          limit=200)[0] for p in rho])
        df = ff.fx_per_um[1] - ff.fx_per_um[0]
        area = inside.sum() * pitch ** 2  # sampled disk area (staircase edge)
        expected = (2 * np.pi * hankel) ** 2 * df * df / area
        # tolerance: 2 % of the peak, the staircase edge of a 48-sample disk (edge/area ~ 2 / 48)
        assert np.max(np.abs(fft_profile - expected)) < 0.02 * expected.max()


def test_airy_first_dark_ring_of_ideal_lens():
    # Source: Born & Wolf, Principles of Optics, 7th ed., sec. 8.5.2: Airy pattern, first zero at
    # 0.61 lambda / NA, i.e. 1.22 lambda f / D for small NA (uniformly illuminated circular aperture).
    lam_nm, pitch, diameter, focal = 532.0, 0.325, 50.0, 500.0
    x, xx, yy, inside = _disk(162, pitch, diameter / 2)
    k = 2 * np.pi / (lam_nm * 1e-3)
    field = inside * np.exp(-1j * k * (np.sqrt(xx ** 2 + yy ** 2 + focal ** 2) - focal))
    expected = 1.22 * lam_nm * 1e-3 * focal / diameter
    r_out = np.linspace(0.8 * expected, 1.2 * expected, 401)
    u = grid.angular_spectrum_points(field, pitch, pitch, lam_nm, focal, r_out, np.array([0.0]))[0]
    inten = np.abs(u) ** 2
    first_min = r_out[np.argmin(inten)]
    centre = np.abs(grid.angular_spectrum_points(field, pitch, pitch, lam_nm, focal, [0.0], [0.0]))[0, 0] ** 2
    assert inten.min() < 1e-4 * centre  # a true dark ring
    # tolerance 0.5 %: output step 0.1 %, staircase aperture and the focal shift of a Fresnel number 2.3 lens
    # (Li & Wolf 1981, Opt. Commun. 39, 211) are each a few tenths of a percent
    assert first_min == pytest.approx(expected, rel=5e-3)


def test_angular_spectrum_matches_points_and_conserves_power():
    lam_nm, pitch = 633.0, 0.4
    x, xx, yy, inside = _disk(96, pitch, 10.0)
    w = 4.0
    field = np.exp(-(xx ** 2 + yy ** 2) / w ** 2) * np.exp(1j * 0.5 * xx)
    z = 30.0
    grid_prop = grid.angular_spectrum(field, pitch, pitch, lam_nm, z, pad_factor=2)
    pts = grid.angular_spectrum_points(field, pitch, pitch, lam_nm, z, x, x, cell_aperture=False, pad_factor=2)
    assert np.max(np.abs(grid_prop - pts)) < 1e-9
    # energy conserved for a propagating, well-contained beam (no evanescent content at this sampling)
    assert np.sum(np.abs(grid_prop) ** 2) == pytest.approx(np.sum(np.abs(field) ** 2), rel=1e-6)
    # Source: Siegman 1986, Lasers, ch. 17: Gaussian beam width w(z) = w0 sqrt(1 + (z / zR)^2), zR = pi w0^2 / lam
    w0 = w / np.sqrt(1.0)  # field exp(-r^2/w^2) is a Gaussian of waist w
    zr = np.pi * w0 ** 2 / (lam_nm * 1e-3)
    wz = w0 * np.sqrt(1 + (z / zr) ** 2)
    inten = np.abs(grid_prop) ** 2
    r2 = (xx - z * np.tan(np.arcsin(0.5 / (2 * np.pi / (lam_nm * 1e-3))))) ** 2 + yy ** 2
    second_moment = np.sqrt(2 * np.sum(inten * r2) / np.sum(inten))
    assert second_moment == pytest.approx(wz, rel=0.02)
