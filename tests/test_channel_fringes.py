"""Per-channel fringe reading of multiplexed beams (metalay.checks.fringes.read_channel_charges).

The fields are phase-only multiplexed vortex beams built here from the textbook encoding (invented test
scenarios): E = exp(i arg sum_k exp(i (l_k phi + 2 pi f_k . r))) over a disk.
Source: Heckenberg et al. 1992, Opt. Quantum Electron. 24, S951 (a vortex of charge l with a tilted plane reference
gives a fork with l extra fringes); Takeda, Ina & Kobayashi 1982, J. Opt. Soc. Am. 72, 156 (Fourier demodulation).
"""

import math

import numpy as np
import pytest

from metalay.checks.fringes import read_channel_charges

LAM_NM = 532.0


def _grid(diameter_um=150.0, pitch_um=0.65):
    n = int(diameter_um / pitch_um) + 1
    x = (np.arange(n) - n // 2) * pitch_um
    return x, x.copy()


def _multiplexed(x, y, channels, diameter_um=150.0, center=(0.0, 0.0)):
    X, Y = np.meshgrid(x, y)
    phi = np.arctan2(Y - center[1], X - center[0])
    lam = LAM_NM * 1e-3
    s = sum(np.exp(1j * (lc * phi + 2 * np.pi * (u * X + v * Y) / lam)) for lc, u, v in channels)
    return np.exp(1j * np.angle(s)) * (np.hypot(X, Y) < diameter_um / 2)


def _ring(charges, angle_deg=3.0, azimuth0_deg=0.0):
    s = math.sin(math.radians(angle_deg))
    n = len(charges)
    return [(lc, s * math.cos(math.radians(azimuth0_deg + 360 * k / n)), s * math.sin(math.radians(azimuth0_deg
                                                                                                   + 360 * k / n)))
            for k, lc in enumerate(charges)]


@pytest.mark.parametrize("charges", [(-2, 1, 3), (4, -1, 0, 2, -3)])
def test_every_channel_reads_its_own_charge(charges):
    x, y = _grid()
    ch = _ring(charges)
    out = read_channel_charges(_multiplexed(x, y, ch), x, y, ch, wavelength_nm=LAM_NM)
    assert [o.readable for o in out] == [True] * len(charges)
    assert [o.reading.charge for o in out] == list(charges)
    for o, (_, u, v) in zip(out, ch):  # the reference points (nearly) at its channel
        assert math.hypot(o.reference_direction[0] - u, o.reference_direction[1] - v) < 0.02


def test_the_reading_comes_from_the_field_not_from_the_design():
    # Sign convention: the field carries the opposite charges of the stated design; the reading follows the
    # field (a reading that copied the design or flipped the reference side would fail here).
    x, y = _grid()
    design = _ring((-2, 1, 3))
    actual = [(-lc, u, v) for lc, u, v in design]
    out = read_channel_charges(_multiplexed(x, y, actual), x, y, design, wavelength_nm=LAM_NM)
    assert [o.reading.charge for o in out] == [2, -1, -3] and all(o.readable for o in out)


def test_a_channel_with_a_stray_vortex_is_unreadable():
    # A stray unit vortex inside the beam (between the loop radii) makes the inner and outer loops disagree
    # (charge 1 inside, 2 outside): the reading is "unreadable", not a number; the other channel still reads.
    x, y = _grid()
    ch = _ring((1, -2))
    X, Y = np.meshgrid(x, y)
    z = X + 1j * Y
    lam = LAM_NM * 1e-3
    r_ap = 75.0
    z1 = 0.705 * r_ap * np.exp(0.4j)
    comp = [np.exp(1j * np.angle(z)) * (z - z1) / np.abs(z - z1), np.exp(-2j * np.angle(z))]
    s = sum(c * np.exp(2j * np.pi * (u * X + v * Y) / lam) for c, (_, u, v) in zip(comp, ch))
    field = np.exp(1j * np.angle(s)) * (np.abs(z) < r_ap)
    out = read_channel_charges(field, x, y, ch, wavelength_nm=LAM_NM)
    assert not out[0].readable and "disagree" in out[0].reason
    w = np.rint(out[0].reading.windings)
    assert set(w.tolist()) == {1.0, 2.0}
    assert out[1].readable and out[1].reading.charge == -2
