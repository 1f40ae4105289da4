"""Orbital-angular-momentum (OAM) spectrum of a sampled field: power per topological charge about an axis.

The field is resampled on a polar grid ``(r_k, phi_m)`` centred on the chosen axis (cubic-spline interpolation
of the real and imaginary parts by default), Fourier transformed along ``phi`` and the squared harmonics are
integrated over ``r``:

    c_l(r) = (1 / 2 pi) int_0^{2 pi} E(r, phi) exp(-i l phi) dphi,
    P_l    = 2 pi int_0^R |c_l(r)|^2 r dr,          sum_l P_l = int_disk |E|^2 dA   (Parseval).

The weights ``P_l / sum_l P_l`` are the spiral spectrum; the purity of charge ``l`` is its weight.

References
----------
Torner, Torres & Carrasco 2005, Opt. Express 13, 873 (digital spiral imaging: the spiral spectrum).
Molina-Terriza, Torres & Torner 2001, Phys. Rev. Lett. 88, 013601 (decomposition into exp(i l phi) harmonics).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from metalay.errors import MetalayError

__all__ = ["OamSpectrum", "oam_spectrum", "oam_spectrum_polar", "polar_resample"]


@dataclass(frozen=True, eq=False)
class OamSpectrum:
    """Spiral spectrum about one axis.

    Attributes
    ----------
    charges : ndarray (K,) int
        Topological charges reported.
    weights : ndarray (K,) float
        Fraction of the analysed power carried by each charge (all harmonics sum to 1; the reported range may sum
        to less).
    power_analysed : float
        ``int |E|^2 dA`` over the analysed disk (field units squared times um^2).
    center_x_um, center_y_um, radius_um : float
        Axis and radius of the analysed disk.
    n_radial, n_azimuthal : int
        Polar sampling used.
    """

    charges: np.ndarray
    weights: np.ndarray
    power_analysed: float
    center_x_um: float
    center_y_um: float
    radius_um: float
    n_radial: int
    n_azimuthal: int

    def weight(self, charge: int) -> float:
        """Weight of ``charge`` (0 when outside the reported range)."""
        hit = np.flatnonzero(self.charges == int(charge))
        return float(self.weights[hit[0]]) if hit.size else 0.0

    def purity(self, charge: int) -> float:
        """Mode purity of ``charge``: its share of the analysed power."""
        return self.weight(charge)

    def mean_charge(self) -> float:
        """Power-weighted mean charge over the reported range (normalised to the reported total)."""
        total = float(self.weights.sum())
        return float(np.dot(self.charges, self.weights) / total) if total > 0 else 0.0


def oam_spectrum_polar(values: np.ndarray, r_um: np.ndarray, *, charges=range(-10, 11),
                       center=(0.0, 0.0), workers: int = 2) -> OamSpectrum:
    """Spiral spectrum of a field given on a polar grid.

    Parameters
    ----------
    values : ndarray (n_radial, n_azimuthal) complex
        ``E(r_k, phi_m)`` with ``phi_m = 2 pi m / n_azimuthal``.
    r_um : ndarray (n_radial,)
        Radii, uniformly spaced with midpoints ``r_k = (k + 1/2) dr`` (midpoint rule).
    charges : iterable of int
        Charges to report; ``|l| < n_azimuthal / 2`` required.

    Returns
    -------
    OamSpectrum
    """
    values = np.asarray(values)
    r_um = np.asarray(r_um, dtype=np.float64)
    nr, nphi = values.shape
    charges = np.asarray(list(charges), dtype=np.int64)
    if charges.size and np.max(np.abs(charges)) >= nphi // 2:
        raise MetalayError(f"oam: charges up to {int(np.max(np.abs(charges)))} need more than {nphi} azimuthal "
                           "samples")
    dr = float(r_um[1] - r_um[0]) if nr > 1 else float(2 * r_um[0])
    harm = sfft.fft(values, axis=1, workers=workers) / nphi  # c_l(r_k) for l in fft order
    power_l = 2 * np.pi * np.einsum("kl,k->l", np.abs(harm) ** 2, r_um * dr)
    total = float(power_l.sum())
    weights = power_l[np.mod(charges, nphi)] / total if total > 0 else np.zeros(charges.size)
    return OamSpectrum(charges=charges, weights=weights, power_analysed=total, center_x_um=float(center[0]),
                       center_y_um=float(center[1]), radius_um=float(r_um[-1] + dr / 2), n_radial=nr,
                       n_azimuthal=nphi)


def _polar_bilinear(field, x_um, y_um, dx, dy, r_um, n_azimuthal, center, chunk_points):
    """Bilinear interpolation onto the polar grid directly on the complex samples (zero outside the grid).

    Same result as ``scipy.ndimage.map_coordinates(order=1, mode="constant")`` on the real and imaginary parts,
    without converting the whole field to two float64 planes.
    """
    ny, nx = field.shape
    padded = np.zeros((ny + 2, nx + 2), dtype=np.result_type(field.dtype, np.complex64))
    padded[1:-1, 1:-1] = field  # one ring of zeros: neighbours outside the grid contribute nothing
    phi = 2 * np.pi * np.arange(n_azimuthal) / n_azimuthal
    cos_phi, sin_phi = np.cos(phi), np.sin(phi)
    out = np.empty((r_um.size, n_azimuthal), dtype=np.complex128)
    rows = max(1, chunk_points // n_azimuthal)
    for k0 in range(0, r_um.size, rows):  # loop over radial blocks (bounded memory), vectorised inside
        r = r_um[k0:k0 + rows, None]
        col = (center[0] + r * cos_phi - x_um[0]) / dx + 1.0
        row = (center[1] + r * sin_phi - y_um[0]) / dy + 1.0
        col = np.clip(col, 0.0, nx + 1.0 - 1e-9)
        row = np.clip(row, 0.0, ny + 1.0 - 1e-9)
        c0 = np.floor(col).astype(np.intp)
        r0 = np.floor(row).astype(np.intp)
        fc = col - c0
        fr = row - r0
        c1 = np.minimum(c0 + 1, nx + 1)
        r1 = np.minimum(r0 + 1, ny + 1)
        val = ((1 - fr) * ((1 - fc) * padded[r0, c0] + fc * padded[r0, c1])
               + fr * ((1 - fc) * padded[r1, c0] + fc * padded[r1, c1]))
        out[k0:k0 + rows] = val
    return out


def polar_resample(field: np.ndarray, x_um: np.ndarray, y_um: np.ndarray, r_um: np.ndarray, n_azimuthal: int, *,
                   center=(0.0, 0.0), order: int = 3, chunk_points: int = 4_000_000) -> np.ndarray:
    """Interpolate a Cartesian field onto the polar grid ``(r_um, 2 pi m / n_azimuthal)``.

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Samples on uniform axes ``x_um`` (nx,), ``y_um`` (ny,).
    order : int
        Spline order for ``scipy.ndimage.map_coordinates`` (1 = bilinear, 3 = cubic).
    chunk_points : int
        Polar points interpolated per batch (bounds memory).

    Returns
    -------
    ndarray (len(r_um), n_azimuthal) complex128
    """
    field = np.asarray(field)
    x_um = np.asarray(x_um, dtype=np.float64)
    y_um = np.asarray(y_um, dtype=np.float64)
    dx = float(x_um[1] - x_um[0])
    dy = float(y_um[1] - y_um[0])
    if order == 1:
        return _polar_bilinear(field, x_um, y_um, dx, dy, r_um, n_azimuthal, center, chunk_points)
    planes = []
    for part in (field.real, field.imag):
        part = np.asarray(part, dtype=np.float64)
        planes.append(ndimage.spline_filter(part, order=order, mode="constant") if order > 1 else part)
    phi = 2 * np.pi * np.arange(n_azimuthal) / n_azimuthal
    cos_phi, sin_phi = np.cos(phi), np.sin(phi)
    out = np.empty((r_um.size, n_azimuthal), dtype=np.complex128)
    rows = max(1, chunk_points // n_azimuthal)
    for k0 in range(0, r_um.size, rows):  # loop over radial blocks (bounded memory), vectorised inside
        r = r_um[k0:k0 + rows, None]
        col = (center[0] + r * cos_phi - x_um[0]) / dx
        row = (center[1] + r * sin_phi - y_um[0]) / dy
        coords = np.stack([row.ravel(), col.ravel()])
        re = ndimage.map_coordinates(planes[0], coords, order=order, mode="constant", prefilter=False)
        im = ndimage.map_coordinates(planes[1], coords, order=order, mode="constant", prefilter=False)
        out[k0:k0 + rows] = (re + 1j * im).reshape(r.shape[0], n_azimuthal)
    return out


def oam_spectrum(field: np.ndarray, x_um: np.ndarray, y_um: np.ndarray, *, center=(0.0, 0.0),
                 radius_um: float | None = None, charges=range(-10, 11), samples_per_pitch: float = 1.0,
                 order: int = 3, workers: int = 2) -> OamSpectrum:
    """Spiral (OAM) spectrum of a Cartesian field about the axis through ``center``.

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Field samples; row = y, column = x.
    x_um, y_um : ndarray (nx,), (ny,)
        Uniform sample coordinates in micrometres.
    center : (float, float)
        Axis position ``(x_um, y_um)``.
    radius_um : float, optional
        Radius of the analysed disk; default: the largest disk inside the sampled window, less one pitch.
    charges : iterable of int
        Charges to report (default -10..10).
    samples_per_pitch : float
        Polar samples per Cartesian pitch, radially and along the outer circumference.
    order : int
        Interpolation spline order (3 = cubic).
    workers : int
        Threads for ``scipy.fft``.

    Returns
    -------
    OamSpectrum

    Notes
    -----
    ``P_l = 2 pi sum_k |c_l(r_k)|^2 r_k dr`` with ``c_l`` the azimuthal DFT of the resampled field; the number of
    azimuthal samples is ``next_fast_len(2 pi R samples_per_pitch / pitch)``, at least 64 and more than four
    times the largest reported charge.

    References
    ----------
    Torner, Torres & Carrasco 2005, Opt. Express 13, 873.
    """
    x_um = np.asarray(x_um, dtype=np.float64)
    y_um = np.asarray(y_um, dtype=np.float64)
    field = np.asarray(field)
    if field.shape != (y_um.size, x_um.size):
        raise MetalayError(f"oam: field shape {field.shape} does not match axes ({y_um.size}, {x_um.size})")
    pitch = min(float(x_um[1] - x_um[0]), float(y_um[1] - y_um[0]))
    cx, cy = float(center[0]), float(center[1])
    room = min(cx - x_um[0], x_um[-1] - cx, cy - y_um[0], y_um[-1] - cy) - pitch
    if radius_um is None:
        radius_um = room
    if not (0 < radius_um <= room + 1e-9):
        raise MetalayError(f"oam: radius_um = {radius_um:g} must be in (0, {room:g}] for centre ({cx:g}, {cy:g}) "
                           "um inside the sampled window")
    charges = list(charges)
    step = pitch / samples_per_pitch
    nr = max(4, int(np.ceil(radius_um / step)))
    dr = radius_um / nr
    r_um = (np.arange(nr) + 0.5) * dr
    lmax = max((abs(c) for c in charges), default=0)
    nphi_min = max(64, 4 * lmax + 1)
    nphi = int(sfft.next_fast_len(max(nphi_min, int(np.ceil(2 * np.pi * radius_um / step)))))
    if nr < 64:
        polar = polar_resample(field, x_um, y_um, r_um, nphi, center=(cx, cy), order=order)
        return oam_spectrum_polar(polar, r_um, charges=charges, center=(cx, cy), workers=workers)
    # Rings in radial blocks, each sampled at the azimuthal density of its outer ring (the same samples per pitch
    # everywhere, instead of the outer ring's count at every radius): about half the points of a uniform polar
    # grid. Per ring the azimuthal DFT gives c_l(r); the power of charge l sums over rings (Parseval per ring).
    charges_arr = np.asarray(charges, dtype=np.int64)
    power_charges = np.zeros(charges_arr.size)
    total = 0.0
    for k0 in range(0, nr, max(1, nr // 16)):  # 16 radial blocks (a short axis)
        rb = r_um[k0:k0 + max(1, nr // 16)]
        nphi_b = int(sfft.next_fast_len(max(nphi_min, int(np.ceil(2 * np.pi * (rb[-1] + dr / 2) / step)))))
        polar = polar_resample(field, x_um, y_um, rb, nphi_b, center=(cx, cy), order=order)
        harm = sfft.fft(polar, axis=1, workers=workers) / nphi_b
        p_l = 2 * np.pi * np.einsum("kl,k->l", (harm.real ** 2 + harm.imag ** 2), rb * dr)
        total += float(p_l.sum())
        power_charges += p_l[np.mod(charges_arr, nphi_b)]
    weights = power_charges / total if total > 0 else np.zeros(charges_arr.size)
    return OamSpectrum(charges=charges_arr, weights=weights, power_analysed=total, center_x_um=cx, center_y_um=cy,
                       radius_um=float(r_um[-1] + dr / 2), n_radial=nr, n_azimuthal=nphi)
