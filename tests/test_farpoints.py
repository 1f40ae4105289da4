"""Far field at chosen directions (direct sum, zoom) against analytic results and a padded FFT."""

import numpy as np
import pytest

from metalay.checks import farpoints, grid
from metalay.errors import MetalayError

LAM = 532.0
PITCH = 0.325


def _square_plane_wave(n, u0, v0):
    x = grid.centered_axis(n, PITCH)
    k = 2 * np.pi / (LAM * 1e-3)
    field = np.exp(1j * k * (u0 * x[None, :] + v0 * x[:, None]))
    return x, field


def test_tilted_plane_wave_on_square_aperture_is_sinc_squared():
    # Source: Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.4.1: the Fraunhofer pattern of a
    # uniformly illuminated square aperture of side L is sinc^2(L f_x) sinc^2(L f_y), centred on the direction of
    # the illuminating plane wave.  Tolerance: the sampled aperture (N = 200 cells) differs from the continuous one
    # by the Dirichlet kernel, relative error ~ (pi dx df)^2 / 3 < 1e-3 within 3 lobes.
    n = 200
    u0, v0 = np.sin(np.radians(3.0)), np.sin(np.radians(1.0))
    x, field = _square_plane_wave(n, u0, v0)
    side = n * PITCH
    lam_um = LAM * 1e-3
    du = np.linspace(-3.2, 3.2, 33) * lam_um / side  # +-3.2 lobes in each direction
    uu, vv = np.meshgrid(u0 + du, v0 + 0.37 * du)
    amp = farpoints.far_field_at_grid(field, x, x, uu, vv, LAM)
    got = farpoints.spot_strength(amp, field)
    want = np.sinc(side * (uu - u0) / lam_um) ** 2 * np.sinc(side * (vv - v0) / lam_um) ** 2
    assert np.max(np.abs(got - want)) < 1e-3
    # the peak of a perfect plane wave has strength 1 (Cauchy-Schwarz bound reached)
    assert farpoints.spot_strength(farpoints.far_field_at_grid(field, x, x, u0, v0, LAM), field) == pytest.approx(1.0)


def test_site_sum_equals_closed_form_dirichlet_kernel():
    # Source: geometric series, sum_{k=0}^{N-1} q^k = (1 - q^N) / (1 - q) (the Dirichlet kernel of a sampled
    # aperture; Goodman 2005 sec. 4.4 for the continuous limit).  Exact to rounding.
    n = 60
    u0 = 0.05
    x, field = _square_plane_wave(n, u0, 0.0)
    xx, yy = np.meshgrid(x, x)
    lam_um = LAM * 1e-3
    u = u0 + np.array([0.0, 0.3, 1.7, 4.2]) * lam_um / (n * PITCH)
    amp = farpoints.far_field_at_sites(field.ravel(), xx.ravel(), yy.ravel(), u, 0.0, LAM, chunk_elements=5000)
    t = np.pi * PITCH * (u - u0) / lam_um
    with np.errstate(invalid="ignore", divide="ignore"):
        dirichlet = np.where(t == 0, n, np.sin(n * t) / np.sin(t))
    assert np.allclose(np.abs(amp), np.abs(dirichlet) * n, rtol=1e-9, atol=1e-9)


def test_direct_sum_matches_padded_fft_at_bins_and_between_bins():
    # Independent calculation: scipy FFT of the zero-padded field (metalay.checks.grid.far_field) at padding 8.  At the
    # FFT's own bin frequencies the two must agree to single precision (the FFT buffer is complex64); between bins
    # the FFT value comes from bilinear interpolation, which at padding 8 is within 0.2 dB near a spot peak.
    n = 128
    x = grid.centered_axis(n, PITCH)
    xx, yy = np.meshgrid(x, x)
    inside = xx ** 2 + yy ** 2 <= (0.45 * n * PITCH) ** 2
    field = inside * np.exp(1j * (2 * np.arctan2(yy, xx) + 2 * np.pi / 0.532 * 0.04 * xx))
    ff = grid.far_field(field, PITCH, PITCH, LAM, pad_factor=8, keep_field=True, cell_aperture=True)
    rows = np.arange(ff.v.size // 2 - 5, ff.v.size // 2 + 6, 3)
    cols = np.arange(ff.u.size // 2 - 4, ff.u.size // 2 + 90, 7)
    uu, vv = np.meshgrid(ff.u[cols], ff.v[rows])
    amp = farpoints.far_field_at_grid(field, x, x, uu, vv, LAM, cell_um=(PITCH, PITCH))
    norm = 1.0 / (ff.u.size * ff.v.size * ff.near_power)
    fft_power = ff.power[np.ix_(rows, cols)]
    assert np.allclose(np.abs(amp) ** 2 * norm, fft_power, rtol=2e-4, atol=2e-6 * fft_power.max())
    # complex values too (phase referred to the same origin)
    assert np.allclose(amp * np.sqrt(norm), ff.field[np.ix_(rows, cols)], atol=2e-4 * np.abs(amp).max() * np.sqrt(norm))
    # a point between bins, on a bright ring of the vortex spot
    from scipy import ndimage
    u_pt, v_pt = 0.04 + 0.37 * ff.du, 0.0131 + 0.41 * ff.dv
    a = farpoints.far_field_at_grid(field, x, x, u_pt, v_pt, LAM, cell_um=(PITCH, PITCH))
    p_direct = abs(a) ** 2 * norm
    p_interp = ndimage.map_coordinates(ff.power, [[(v_pt - ff.v[0]) / ff.dv], [(u_pt - ff.u[0]) / ff.du]], order=1)[0]
    assert abs(10 * np.log10(p_direct / p_interp)) < 0.2


def test_zoom_equals_pointwise_and_sites_equal_grid():
    # Convergence/consistency check (not an oracle): the outer-product zoom, the point list and the chunked site
    # sum are three evaluations of the same finite sum.
    rng = np.random.default_rng(1)
    x = grid.centered_axis(40, PITCH)
    y = grid.centered_axis(31, PITCH)
    field = rng.normal(size=(31, 40)) + 1j * rng.normal(size=(31, 40))
    ua = np.linspace(-0.1, 0.2, 7)
    va = np.linspace(-0.05, 0.05, 5)
    z = farpoints.far_field_zoom(field, x, y, ua, va, LAM, cell_um=(PITCH, PITCH))
    uu, vv = np.meshgrid(ua, va)
    p = farpoints.far_field_at_grid(field, x, y, uu, vv, LAM, cell_um=(PITCH, PITCH))
    xx, yy = np.meshgrid(x, y)
    s = farpoints.far_field_at_sites(field.ravel(), xx.ravel(), yy.ravel(), uu, vv, LAM, cell_um=(PITCH, PITCH),
                                     chunk_elements=97)
    assert np.allclose(z, p, rtol=1e-10, atol=1e-9) and np.allclose(s, p, rtol=1e-10, atol=1e-9)


def test_bad_inputs_raise_one_line_errors():
    with pytest.raises(MetalayError, match="same length"):
        farpoints.far_field_at_sites(np.ones(3), np.zeros(2), np.zeros(3), 0.0, 0.0, LAM)
    with pytest.raises(MetalayError, match="field shape"):
        farpoints.far_field_at_grid(np.ones((3, 4)), np.zeros(3), np.zeros(4), 0.0, 0.0, LAM)
    with pytest.raises(MetalayError, match="no power"):
        farpoints.spot_strength(1.0, np.zeros(4))
    with pytest.raises(MetalayError, match="must be > 0"):
        farpoints.far_field_at_grid(np.ones((2, 2)), np.zeros(2), np.zeros(2), 0.0, 0.0, -1.0)
