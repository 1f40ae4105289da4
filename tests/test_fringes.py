"""Interferograms and the automatic charge reading."""

import numpy as np
import pytest

from metalay.checks import fringes

PITCH, LAM = 0.325, 532.0


def _vortex_disk(charge, n=160, radius_px=70, levels=None):
    x = (np.arange(n) - n // 2) * PITCH
    xx, yy = np.meshgrid(x, x)
    phi = charge * np.arctan2(yy, xx)
    if levels:
        step = 2 * np.pi / levels
        phi = np.round(phi / step) * step
    return x, (xx ** 2 + yy ** 2 <= (radius_px * PITCH) ** 2) * np.exp(1j * phi)


@pytest.mark.parametrize("charge", list(range(-6, 7)))
def test_reading_returns_design_charge(charge):
    # Source: Heckenberg et al. 1992, Opt. Quantum Electron. 24, S951: a charge-l vortex interfering with a tilted
    # plane wave shows |l| extra fringes at the fork; Takeda et al. 1982, JOSA 72, 156 for the demodulation.
    x, field = _vortex_disk(charge)
    inten = fringes.interferogram(field, x, x, wavelength_nm=LAM)
    reading = fringes.read_charge(inten, x, x)
    assert reading.charge == charge
    assert reading.agreement == 1.0
    assert np.all(np.abs(reading.windings - charge) < 0.05)


def test_reading_with_quantised_phase_and_other_tilt_direction():
    # an 8-level staircase of charge 3 still winds 3 times; a reference tilted towards +y is read as such
    x, field = _vortex_disk(3, levels=8)
    inten = fringes.interferogram(field, x, x, wavelength_nm=LAM, azimuth_deg=90.0)
    assert fringes.read_charge(inten, x, x, azimuth_deg=90.0).charge == 3
    # with the explicit carrier
    fc = fringes.carrier_per_um(LAM, fringes.default_tilt_deg(PITCH, LAM), 90.0)
    assert fringes.read_charge(inten, x, x, carrier=fc).charge == 3
    # telling the reader the wrong side flips the sign: the sign is set by the reference direction
    assert fringes.read_charge(inten, x, x, azimuth_deg=-90.0).charge == -3


def test_reading_about_a_displaced_core():
    # a charge -2 core displaced from the window centre, loops centred on it explicitly
    n = 160
    x = (np.arange(n) - n // 2) * PITCH
    xx, yy = np.meshgrid(x, x)
    field = np.exp(-((xx - 3) ** 2 + (yy + 2) ** 2) / 15.0 ** 2) * np.exp(-2j * np.arctan2(yy + 2, xx - 3))
    inten = fringes.interferogram(field, x, x, wavelength_nm=LAM)
    reading = fringes.read_charge(inten, x, x, center=(3.0, -2.0), radii_um=[4.0, 6.0, 8.0])
    assert reading.charge == -2 and reading.agreement == 1.0
    # a loop that does not enclose the core reads zero
    none = fringes.read_charge(inten, x, x, center=(-10.0, 8.0), radii_um=[3.0])
    assert none.charge == 0


def test_winding_and_errors():
    t = 2 * np.pi * np.arange(100) / 100
    assert fringes.winding_number(np.exp(-3j * t)) == pytest.approx(-3.0)
    from metalay.errors import MetalayError
    x, field = _vortex_disk(1)
    with pytest.raises(MetalayError):
        fringes.interferogram(field, x, x, wavelength_nm=LAM, reference="sideways")
    spiral = fringes.interferogram(field, x, x, wavelength_nm=LAM, reference="collinear")
    assert spiral.shape == field.shape and np.all(spiral >= 0)
