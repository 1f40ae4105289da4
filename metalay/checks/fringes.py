"""Simulated interferograms of a beam with a reference wave, and an automatic reading of the topological charge.

A vortex of charge ``l`` interfering with a tilted plane wave makes a fork: ``|l|`` extra fringes start at the
core.  The reading here does not look at the design: it demodulates the intensity pattern alone by the Fourier-
transform fringe method (isolate one side band of the carrier, shift it to zero frequency, inverse transform) and
counts the winding of the recovered phase around closed loops about the core.  The winding equals the number of
extra fringes at the fork, with its sign fixed by the direction of the reference tilt.

Conventions: reference ``R = a exp(+2 pi i f_c . r)`` (tilted towards ``+f_c``), ``I = |E + R|^2``.  The cross
term ``E R*`` sits at ``-f_c`` in the spectrum of ``I``.

References
----------
Takeda, Ina & Kobayashi 1982, J. Opt. Soc. Am. 72, 156 (Fourier-transform method of fringe-pattern analysis).
Heckenberg et al. 1992, Opt. Quantum Electron. 24, S951 (fork holograms: extra fringes equal the charge).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from metalay.errors import MetalayError

__all__ = ["interferogram", "default_tilt_deg", "carrier_per_um", "ChargeReading", "read_charge",
           "winding_number", "LOOP_TOLERANCE_TURNS"]

#: Largest distance (turns) of a loop's winding from its nearest integer for the reading to count: further off,
#: the loop crosses a phase defect or noise and the reading is "unreadable".
LOOP_TOLERANCE_TURNS = 0.25


def default_tilt_deg(pitch_um: float, wavelength_nm: float, *, samples_per_fringe: float = 6.0) -> float:
    """Reference tilt (degrees, in air) giving ``samples_per_fringe`` samples per fringe at pitch ``pitch_um``."""
    s = wavelength_nm * 1e-3 / (samples_per_fringe * pitch_um)
    if s >= 1:
        raise MetalayError(f"default_tilt_deg: pitch {pitch_um:g} um too fine for {samples_per_fringe:g} samples "
                           f"per fringe at {wavelength_nm:g} nm")
    return float(np.degrees(np.arcsin(s)))


def carrier_per_um(wavelength_nm: float, tilt_deg: float, azimuth_deg: float = 0.0) -> tuple[float, float]:
    """Carrier spatial frequency ``(f_x, f_y)`` in cycles/um of a plane wave tilted by ``tilt_deg`` (in air)."""
    f = np.sin(np.radians(tilt_deg)) / (wavelength_nm * 1e-3)
    az = np.radians(azimuth_deg)
    return float(f * np.cos(az)), float(f * np.sin(az))


def interferogram(field: np.ndarray, x_um: np.ndarray, y_um: np.ndarray, *, wavelength_nm: float,
                  reference: str = "tilted", tilt_deg: float | None = None, azimuth_deg: float = 0.0,
                  curvature_radius_um: float | None = None, reference_amplitude: float | None = None) -> np.ndarray:
    """Intensity ``|E + R|^2`` of a field with a reference wave.

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Beam (e.g. the converted near field with the design's tilt and lens terms removed).
    x_um, y_um : ndarray (nx,), (ny,)
        Sample coordinates.
    wavelength_nm : float
        Vacuum wavelength.
    reference : {"tilted", "collinear"}
        ``"tilted"``: plane wave ``a exp(i k sin(tilt) (x cos az + y sin az))`` (fork pattern);
        ``"collinear"``: spherical wave ``a exp(i k r^2 / (2 R_c))`` on axis (spiral pattern with ``|l|`` arms).
    tilt_deg : float, optional
        Tilt of the plane reference in air; default :func:`default_tilt_deg` (6 samples per fringe).
    azimuth_deg : float
        Direction of the tilt in the x-y plane.
    curvature_radius_um : float, optional
        Radius of curvature of the collinear reference; default puts about 4 rings inside the window.
    reference_amplitude : float, optional
        ``a``; default the root-mean-square of ``|E|`` where ``|E|`` exceeds 10 % of its maximum.

    Returns
    -------
    ndarray (ny, nx) float64
    """
    field = np.asarray(field)
    x_um = np.asarray(x_um, dtype=np.float64)
    y_um = np.asarray(y_um, dtype=np.float64)
    amp = np.abs(field)
    if reference_amplitude is None:
        strong = amp > 0.1 * amp.max() if amp.max() > 0 else np.ones(amp.shape, bool)
        reference_amplitude = float(np.sqrt(np.mean(amp[strong] ** 2)))
    k = 2 * np.pi / (wavelength_nm * 1e-3)
    if reference == "tilted":
        if tilt_deg is None:
            tilt_deg = default_tilt_deg(float(x_um[1] - x_um[0]), wavelength_nm)
        fx, fy = carrier_per_um(wavelength_nm, tilt_deg, azimuth_deg)
        ref = reference_amplitude * np.exp(2j * np.pi * fy * y_um)[:, None] * np.exp(2j * np.pi * fx * x_um)[None, :]
    elif reference == "collinear":
        if curvature_radius_um is None:
            half = 0.5 * min(np.ptp(x_um), np.ptp(y_um))
            curvature_radius_um = k * half ** 2 / (2 * 2 * np.pi * 4)  # ~4 rings out to the window half-width
        r2 = y_um[:, None] ** 2 + x_um[None, :] ** 2
        ref = reference_amplitude * np.exp(1j * k * r2 / (2 * curvature_radius_um))
    else:
        raise MetalayError(f"interferogram: reference = {reference!r}; allowed: 'tilted', 'collinear'")
    return np.abs(field + ref) ** 2


def winding_number(values: np.ndarray) -> float:
    """Total phase winding (in turns) of a closed loop of complex samples (last joins the first)."""
    ph = np.angle(values)
    d = np.diff(np.concatenate([ph, ph[:1]]))
    d = (d + np.pi) % (2 * np.pi) - np.pi
    return float(d.sum() / (2 * np.pi))


@dataclass(frozen=True)
class ChargeReading:
    """Charge read from an interferogram.

    Attributes
    ----------
    charge : int
        Most frequent rounded winding over the loops.
    windings : ndarray (L,)
        Winding (turns) of the demodulated phase around each loop.
    radii_um : ndarray (L,)
        Loop radii.
    center_x_um, center_y_um : float
        Loop centre (intensity-weighted centroid of the demodulated beam unless given).
    carrier_per_um : (float, float)
        Carrier used for demodulation.
    agreement : float
        Fraction of loops that agree with ``charge``.

    Notes
    -----
    :attr:`readable` is false when the loops disagree (any loop rounds to another integer) or any loop's winding
    is further than :data:`LOOP_TOLERANCE_TURNS` from an integer; such a reading is "unreadable", not a number.
    """

    charge: int
    windings: np.ndarray
    radii_um: np.ndarray
    center_x_um: float
    center_y_um: float
    carrier_per_um: tuple
    agreement: float

    @property
    def readable(self) -> bool:
        """All loops agree on one integer, each within :data:`LOOP_TOLERANCE_TURNS` of it."""
        w = np.asarray(self.windings, dtype=np.float64)
        return bool(w.size and self.agreement == 1.0 and np.all(np.isfinite(w))
                    and np.max(np.abs(w - np.rint(w))) <= LOOP_TOLERANCE_TURNS)

    @property
    def status(self) -> str:
        """``"read"`` or ``"unreadable"``."""
        return "read" if self.readable else "unreadable"


def read_charge(intensity: np.ndarray, x_um: np.ndarray, y_um: np.ndarray, *, carrier=None,
                azimuth_deg: float = 0.0, center=None, radii_um=None, workers: int = 2) -> ChargeReading:
    """Read the topological charge from a tilted-reference interferogram (intensity only).

    Parameters
    ----------
    intensity : ndarray (ny, nx) float
        Fringe pattern ``|E + R|^2``.
    x_um, y_um : ndarray
        Uniform sample coordinates.
    carrier : (float, float), optional
        Reference carrier ``(f_x, f_y)`` in cycles/um.  Default: the strongest non-zero-order peak of the
        intensity spectrum in the half plane towards ``azimuth_deg`` (the side the reference is tilted to).
    azimuth_deg : float
        Direction the reference is tilted to (fixes the sign of the reading when the carrier is estimated).
    center : (float, float), optional
        Loop centre; default the centroid of the demodulated beam power.
    radii_um : sequence of float, optional
        Loop radii; default 0.25, 0.35, 0.45, 0.55 of the beam radius ``sqrt(2 <r^2>)``.
    workers : int
        Threads for ``scipy.fft``.

    Returns
    -------
    ChargeReading

    Notes
    -----
    ``I = |E|^2 + a^2 + E a* exp(-2 pi i f_c . r) + c.c.``; keeping the spectrum inside a disk of radius
    ``|f_c| / 2`` about ``-f_c`` and multiplying the inverse transform by ``exp(+2 pi i f_c . r)`` gives ``a* E``,
    whose winding around a loop enclosing the core is the charge ``l``.

    References
    ----------
    Takeda, Ina & Kobayashi 1982, J. Opt. Soc. Am. 72, 156.
    """
    intensity = np.asarray(intensity, dtype=np.float64)
    x_um = np.asarray(x_um, dtype=np.float64)
    y_um = np.asarray(y_um, dtype=np.float64)
    ny, nx = intensity.shape
    dx, dy = float(x_um[1] - x_um[0]), float(y_um[1] - y_um[0])
    spec = sfft.fft2(intensity - intensity.mean(), workers=workers)
    fx = sfft.fftfreq(nx, dx)
    fy = sfft.fftfreq(ny, dy)
    if carrier is None:
        az = np.radians(azimuth_deg)
        mag = np.abs(spec)
        fr = np.hypot(fx[None, :], fy[:, None])
        side = (fx[None, :] * np.cos(az) + fy[:, None] * np.sin(az)) > 0
        mag = np.where(side & (fr > 3.0 / min(nx * dx, ny * dy)), mag, 0.0)
        iy, ix = np.unravel_index(np.argmax(mag), mag.shape)
        carrier = (float(fx[ix]), float(fy[iy]))
    cfx, cfy = float(carrier[0]), float(carrier[1])
    fc = np.hypot(cfx, cfy)
    if fc == 0:
        raise MetalayError("read_charge: carrier frequency must be non-zero")
    keep = np.hypot(fx[None, :] + cfx, fy[:, None] + cfy) < fc / 2
    side_band = sfft.ifft2(spec * keep, workers=workers)
    demod = side_band * np.exp(2j * np.pi * cfy * y_um)[:, None] * np.exp(2j * np.pi * cfx * x_um)[None, :]
    power = np.abs(demod) ** 2
    total = power.sum()
    if center is None:
        cx = float((power.sum(axis=0) * x_um).sum() / total)
        cy = float((power.sum(axis=1) * y_um).sum() / total)
    else:
        cx, cy = float(center[0]), float(center[1])
    if radii_um is None:
        r2 = ((x_um[None, :] - cx) ** 2 + (y_um[:, None] - cy) ** 2)
        beam_r = float(np.sqrt(2 * (power * r2).sum() / total))
        radii_um = beam_r * np.array([0.25, 0.35, 0.45, 0.55])
    radii_um = np.asarray(radii_um, dtype=np.float64)
    windings = []
    for r in radii_um:  # a handful of loops
        n = int(max(256, 8 * 2 * np.pi * r / min(dx, dy)))
        t = 2 * np.pi * np.arange(n) / n
        coords = np.stack([(cy + r * np.sin(t) - y_um[0]) / dy, (cx + r * np.cos(t) - x_um[0]) / dx])
        re = ndimage.map_coordinates(demod.real, coords, order=1, mode="nearest")
        im = ndimage.map_coordinates(demod.imag, coords, order=1, mode="nearest")
        windings.append(winding_number(re + 1j * im))
    windings = np.asarray(windings)
    rounded = np.rint(windings).astype(int)
    values, counts = np.unique(rounded, return_counts=True)
    best = int(values[np.argmax(counts)])
    return ChargeReading(charge=best, windings=windings, radii_um=radii_um, center_x_um=cx, center_y_um=cy,
                         carrier_per_um=(cfx, cfy), agreement=float(counts.max() / rounded.size))
