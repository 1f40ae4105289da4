"""Spiral (OAM) spectrum: purity of pure modes, known superpositions, Parseval."""

import numpy as np
import pytest
from scipy import special

from metalay.checks import oam


def _lg(charge, xx, yy, w_um):
    # Laguerre-Gauss LG_{0,l} profile r^|l| exp(-r^2/w^2) exp(i l phi)
    # Source: Allen et al. 1992, Phys. Rev. A 45, 8185 (LG modes carry l hbar of OAM per photon)
    r2 = xx ** 2 + yy ** 2
    return (np.sqrt(r2) / w_um) ** abs(charge) * np.exp(-r2 / w_um ** 2) * np.exp(1j * charge * np.arctan2(yy, xx))


def _axes(n=161, pitch=0.5):
    x = (np.arange(n) - n // 2) * pitch
    return x, *np.meshgrid(x, x)


@pytest.mark.parametrize("charge", [-6, -1, 0, 2, 5, 10])
def test_pure_mode_has_unit_purity(charge):
    # Source: Torner, Torres & Carrasco 2005, Opt. Express 13, 873: a single exp(i l phi) harmonic has a spiral
    # spectrum concentrated in l. Tolerance 1e-6 (cubic interpolation of a smooth field, 16 samples per waist).
    x, xx, yy = _axes()
    field = _lg(charge, xx, yy, w_um=8.0 + abs(charge) * 0.8)
    spec = oam.oam_spectrum(field, x, x)
    assert spec.purity(charge) == pytest.approx(1.0, abs=1e-6)
    assert spec.mean_charge() == pytest.approx(charge, abs=1e-5)


def test_two_mode_superposition_weights():
    # Source: Torner, Torres & Carrasco 2005 (spiral spectrum is |a_l|^2 of the harmonic expansion); modes with
    # equal radial norm so the weights are |a|^2 / (|a|^2 + |b|^2).
    x, xx, yy = _axes()
    m1 = _lg(1, xx, yy, 9.0)
    m2 = _lg(-3, xx, yy, 9.0)
    # norm of (r/w)^|l| exp(-r^2/w^2): int |.|^2 dA = 2 pi (w^2 / 4) 2^-|l| Gamma(|l| + 1)
    n1 = np.sqrt(2 * np.pi * 81 / 4 * 2.0 ** -1 * special.gamma(2))
    n2 = np.sqrt(2 * np.pi * 81 / 4 * 2.0 ** -3 * special.gamma(4))
    a, b = 0.8, 0.6j
    field = a * m1 / n1 + b * m2 / n2
    spec = oam.oam_spectrum(field, x, x, charges=range(-5, 6))
    assert spec.weight(1) == pytest.approx(0.64, abs=1e-5)
    assert spec.weight(-3) == pytest.approx(0.36, abs=1e-5)
    assert spec.weight(0) < 1e-8


def test_parseval_polar_power_equals_cartesian_power():
    # Parseval for the azimuthal DFT: sum_l P_l equals the integral of |E|^2 over the analysed disk.
    x, xx, yy = _axes()
    rng = np.random.default_rng(3)
    field = sum(rng.normal() * _lg(c, xx, yy, 7.0) * np.exp(1j * rng.uniform(0, 6.28)) for c in range(-4, 5))
    spec = oam.oam_spectrum(field, x, x)
    cart = np.sum(np.abs(field) ** 2) * 0.5 ** 2
    assert spec.power_analysed == pytest.approx(cart, rel=1e-4)
    # the reported range (-10..10) holds all the power here
    assert spec.weights.sum() == pytest.approx(1.0, abs=1e-6)


def test_off_axis_centre_and_polar_entry():
    x, xx, yy = _axes()
    field = _lg(3, xx - 5.0, yy + 2.0, 6.0)
    spec = oam.oam_spectrum(field, x, x, center=(5.0, -2.0), radius_um=30.0)
    assert spec.purity(3) == pytest.approx(1.0, abs=1e-5)
    # about a displaced axis the same beam is not pure (OAM is axis dependent)
    shifted = oam.oam_spectrum(field, x, x, center=(0.0, 0.0), radius_um=35.0)
    assert shifted.purity(3) < 0.9
    # exact polar input
    r = (np.arange(50) + 0.5) * 0.2
    phi = 2 * np.pi * np.arange(64) / 64
    vals = np.exp(-r[:, None] ** 2) * (np.exp(2j * phi)[None, :] + 0.5 * np.exp(-1j * phi)[None, :])
    sp = oam.oam_spectrum_polar(vals, r, charges=range(-3, 4))
    assert sp.weight(2) == pytest.approx(0.8, abs=1e-12)
    assert sp.weight(-1) == pytest.approx(0.2, abs=1e-12)


def test_bad_radius_raises():
    from metalay.errors import MetalayError
    x, xx, yy = _axes(41)
    with pytest.raises(MetalayError):
        oam.oam_spectrum(np.ones((41, 41)), x, x, radius_um=100.0)
