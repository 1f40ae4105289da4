"""The FFT-centred sampling grid, frequency-to-angle conversion and free-space propagation.

This is the one module that knows where the zero frequency sits in an FFT array and how spatial frequency maps to
a direction. Every other module asks it.

Conventions
-----------
* Arrays are indexed ``[row, column] = [y, x]``; ``x`` grows with the column index, ``y`` with the row index.
* Time dependence ``exp(-i omega t)``; a plane wave travelling to +z with transverse wave vector ``kx`` is
  ``exp(i (kx x + kz z))``.  The forward transform used for the far field is
  ``F(f) = sum_x E(x) exp(-2 pi i f x)``, so a near-field phase ``+2 pi f0 x`` puts power at ``f = +f0``: a phase
  increasing along +x sends light to the +x side of the far field (pinned by a test).
* Direction cosines in the exit medium: ``u = wavelength * f_x / n``, ``v = wavelength * f_y / n``
  (``u = sin(theta_x)`` for a plane wave; the grating equation ``sin(theta) = wavelength / period`` for ``n = 1``).
* The near field is *piecewise constant over the unit cells*: each sample is the cell's zeroth-order response over
  a ``dx_um x dy_um`` rectangle.  Its spectrum is the DFT of the samples times
  ``sinc(dx f_x) sinc(dy f_y)`` (the cell-aperture factor, ``cell_aperture=True``).  Power not inside the first
  Brillouin zone ``|f_x| < 1/(2 dx)`` (higher lattice orders) is the complement of the far-field sum.

References
----------
Goodman, Introduction to Fourier Optics, 3rd ed. (2005), ch. 3-4 (angular spectrum, Fraunhofer diffraction).
Matsushima & Shimobaba 2009, Opt. Express 17, 19662 (band-limited angular spectrum method).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from metalay.errors import MetalayError

__all__ = [
    "centered_axis",
    "frequency_axis",
    "direction_cosines",
    "FarField",
    "far_field",
    "cell_aperture_factor",
    "angular_spectrum",
    "angular_spectrum_points",
    "fft_size",
]


def centered_axis(n: int, step_um: float) -> np.ndarray:
    """Coordinates of an FFT-centred axis: ``(k - n // 2) * step_um`` for ``k = 0 .. n - 1`` (sample n//2 at 0)."""
    return (np.arange(n, dtype=np.float64) - n // 2) * float(step_um)


def frequency_axis(n: int, step_um: float) -> np.ndarray:
    """Spatial frequencies (cycles/um) of an ``fftshift``-ed length-``n`` transform, zero at index ``n // 2``.

    Notes
    -----
    ``f_k = (k - n // 2) / (n * step_um)``; the spacing ``1 / (n step)`` is the angular resolution in frequency.
    """
    return (np.arange(n, dtype=np.float64) - n // 2) / (n * float(step_um))


def direction_cosines(n: int, step_um: float, wavelength_nm: float, *, medium_index: float = 1.0) -> np.ndarray:
    """Direction cosines ``u = wavelength * f / n_medium`` of an ``fftshift``-ed length-``n`` transform."""
    return frequency_axis(n, step_um) * (wavelength_nm * 1e-3) / float(medium_index)


def fft_size(n: int, pad_factor: float) -> int:
    """FFT length for ``n`` samples padded by ``pad_factor`` (>= 1), rounded up with ``scipy.fft.next_fast_len``."""
    if not (pad_factor >= 1.0):
        raise MetalayError(f"pad_factor = {pad_factor!r} must be >= 1")
    return int(sfft.next_fast_len(int(np.ceil(n * pad_factor))))


def cell_aperture_factor(fx: np.ndarray, fy: np.ndarray, dx_um: float, dy_um: float) -> np.ndarray:
    """Field factor ``sinc(dx f_x) sinc(dy f_y)`` of a cell-sized rectangle (numpy ``sinc(t) = sin(pi t)/(pi t)``).

    Returns an ``(len(fy), len(fx))`` float array (outer product).
    """
    return np.outer(np.sinc(dy_um * fy), np.sinc(dx_um * fx))


@dataclass(frozen=True, eq=False)
class FarField:
    """Far field of a near field, ``fftshift``-ed so that zero frequency is at ``[ny // 2, nx // 2]``.

    Attributes
    ----------
    u, v : ndarray (nu,), (nv,)
        Direction cosines along x and y in the exit medium (``u = wavelength f_x / n``).
    fx_per_um, fy_per_um : ndarray
        Spatial frequencies (cycles/um).
    power : ndarray (nv, nu) float32
        Fraction of the near-field power (``sum |E|^2``) carried by each frequency bin; sums to the power inside
        the first Brillouin zone of the sampling lattice (<= 1; exactly 1 when ``cell_aperture`` is False).
    field : ndarray (nv, nu) complex64 or None
        Complex far-field amplitude (phase referred to the near-field origin), scaled so ``|field|^2 == power``.
    wavelength_nm, medium_index : float
    near_power : float
        ``sum |E|^2`` of the near field (in units of one cell's incident power).
    """

    u: np.ndarray
    v: np.ndarray
    fx_per_um: np.ndarray
    fy_per_um: np.ndarray
    power: np.ndarray
    field: np.ndarray | None
    wavelength_nm: float
    medium_index: float
    near_power: float

    @property
    def propagating(self) -> np.ndarray:
        """Boolean mask of bins with ``u^2 + v^2 < 1`` (propagating in the exit medium)."""
        return (self.u[None, :] ** 2 + self.v[:, None] ** 2) < 1.0

    @property
    def du(self) -> float:
        return float(self.u[1] - self.u[0]) if self.u.size > 1 else 0.0

    @property
    def dv(self) -> float:
        return float(self.v[1] - self.v[0]) if self.v.size > 1 else 0.0


def far_field(field: np.ndarray, dx_um: float, dy_um: float, wavelength_nm: float, *, x0_um: float | None = None,
              y0_um: float | None = None, pad_factor: float = 2.0, cell_aperture: bool = True,
              medium_index: float = 1.0, keep_field: bool = False, workers: int = 2) -> FarField:
    """Fraunhofer far field of a sampled near field by FFT.

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Near-field samples, row = y, column = x.
    dx_um, dy_um : float
        Sample (cell) pitch along x and y in micrometres.
    wavelength_nm : float
        Vacuum wavelength.
    x0_um, y0_um : float, optional
        Coordinates of sample ``[0, 0]``; default: the FFT-centred axis (sample ``n // 2`` at 0).
    pad_factor : float
        Zero padding (FFT length >= ``pad_factor`` times the field size); 2 samples the far-field intensity at the
        Nyquist rate of the aperture.
    cell_aperture : bool
        Multiply by the cell-rectangle factor ``sinc(dx f_x) sinc(dy f_y)`` (piecewise-constant near field).
    medium_index : float
        Refractive index of the exit medium (direction cosines are ``wavelength f / n``).
    keep_field : bool
        Also return the complex far field (doubles the memory).
    workers : int
        Threads for ``scipy.fft``.

    Returns
    -------
    FarField

    Notes
    -----
    ``F(f) = sum_r E(r) exp(-2 pi i f . r)``; by Parseval ``sum_f |F|^2 = N_x N_y sum_r |E|^2`` over the padded
    grid, so ``power = |F|^2 s(f)^2 / (N_x N_y sum |E|^2)`` with ``s`` the cell-aperture factor.

    References
    ----------
    Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.2 (Fraunhofer approximation).
    """
    field = np.asarray(field)
    if field.ndim != 2 or field.size == 0:
        raise MetalayError(f"far_field: field must be a non-empty 2-D array, got shape {field.shape}")
    ny, nx = field.shape
    if x0_um is None:
        x0_um = -(nx // 2) * dx_um
    if y0_um is None:
        y0_um = -(ny // 2) * dy_um
    mx, my = fft_size(nx, pad_factor), fft_size(ny, pad_factor)
    near_power = float(np.vdot(field.ravel(), field.ravel()).real)
    buf = np.zeros((my, mx), dtype=np.complex64)
    buf[:ny, :nx] = field
    buf = sfft.fft2(buf, overwrite_x=True, workers=workers)
    fx = frequency_axis(mx, dx_um)
    fy = frequency_axis(my, dy_um)
    norm = 1.0 / (float(mx) * float(my) * near_power) if near_power > 0 else 0.0
    power = np.empty((my, mx), dtype=np.float32)
    np.abs(buf, out=power)
    power *= power
    power = sfft.fftshift(power)
    if cell_aperture:
        power *= (np.sinc(dy_um * fy) ** 2 * norm).astype(np.float32)[:, None]
        power *= (np.sinc(dx_um * fx) ** 2).astype(np.float32)[None, :]
    else:
        power *= np.float32(norm)
    out_field = None
    if keep_field:
        # sample [0, 0] sits at (x0, y0): F(f) = exp(-2 pi i f . r0) DFT(f)
        out_field = sfft.fftshift(buf)
        del buf
        ramp_y = np.exp(-2j * np.pi * fy * y0_um) * np.sqrt(norm)
        ramp_x = np.exp(-2j * np.pi * fx * x0_um)
        if cell_aperture:
            ramp_y = ramp_y * np.sinc(dy_um * fy)
            ramp_x = ramp_x * np.sinc(dx_um * fx)
        out_field *= ramp_y.astype(np.complex64)[:, None]
        out_field *= ramp_x.astype(np.complex64)[None, :]
    lam_um = wavelength_nm * 1e-3
    return FarField(u=fx * lam_um / medium_index, v=fy * lam_um / medium_index, fx_per_um=fx, fy_per_um=fy,
                    power=power, field=out_field, wavelength_nm=float(wavelength_nm),
                    medium_index=float(medium_index), near_power=near_power)


def _transfer(fx: np.ndarray, fy: np.ndarray, wavelength_nm: float, z_um: float, medium_index: float,
              band_limit: bool, df_x: float, df_y: float) -> np.ndarray:
    """Angular-spectrum transfer function ``H(fx, fy; z)`` as a (len(fy), len(fx)) complex128 array."""
    k_cyc = medium_index / (wavelength_nm * 1e-3)  # n / lambda, cycles per um
    arg = k_cyc ** 2 - fy[:, None] ** 2 - fx[None, :] ** 2
    root = np.sqrt(np.abs(arg))
    h = np.where(arg >= 0, np.exp(2j * np.pi * z_um * root), np.exp(-2 * np.pi * abs(z_um) * root))
    if band_limit and z_um != 0:
        # Matsushima & Shimobaba 2009, eq. 13: avoid aliasing of the transfer-function chirp
        lim_x = 1.0 / np.sqrt((2 * df_x * z_um) ** 2 + 1) * k_cyc
        lim_y = 1.0 / np.sqrt((2 * df_y * z_um) ** 2 + 1) * k_cyc
        h = h * ((np.abs(fx)[None, :] < lim_x) & (np.abs(fy)[:, None] < lim_y))
    return h


def angular_spectrum(field: np.ndarray, dx_um: float, dy_um: float, wavelength_nm: float, z_um: float, *,
                     medium_index: float = 1.0, pad_factor: float = 2.0, band_limit: bool = True,
                     workers: int = 2) -> np.ndarray:
    """Propagate a sampled field by ``z_um`` with the (band-limited) angular spectrum method.

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Field at z = 0 (row = y, column = x).
    dx_um, dy_um : float
        Sample pitch.
    wavelength_nm : float
        Vacuum wavelength.
    z_um : float
        Propagation distance (positive = along +z).
    medium_index : float
        Index of the homogeneous medium.
    pad_factor : float
        Zero padding against wrap-around.
    band_limit : bool
        Apply the Matsushima-Shimobaba band limit (suppresses aliasing at long distances).
    workers : int
        Threads for ``scipy.fft``.

    Returns
    -------
    ndarray (ny, nx) complex128
        Field at z on the same sample positions.

    Notes
    -----
    ``U(f; z) = U(f; 0) exp(2 pi i z sqrt((n / lambda)^2 - f_x^2 - f_y^2))`` for the ``exp(-i omega t)``
    convention; evanescent components decay as ``exp(-2 pi z sqrt(f^2 - (n/lambda)^2))``.

    References
    ----------
    Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 3.10.
    Matsushima & Shimobaba 2009, Opt. Express 17, 19662.
    """
    field = np.asarray(field)
    ny, nx = field.shape
    mx, my = fft_size(nx, pad_factor), fft_size(ny, pad_factor)
    buf = np.zeros((my, mx), dtype=np.complex128)
    buf[:ny, :nx] = field
    spec = sfft.fft2(buf, overwrite_x=True, workers=workers)
    fx = sfft.fftfreq(mx, dx_um)
    fy = sfft.fftfreq(my, dy_um)
    spec *= _transfer(fx, fy, wavelength_nm, z_um, medium_index, band_limit, 1.0 / (mx * dx_um),
                      1.0 / (my * dy_um))
    out = sfft.ifft2(spec, overwrite_x=True, workers=workers)
    return out[:ny, :nx].copy()


def angular_spectrum_points(field: np.ndarray, dx_um: float, dy_um: float, wavelength_nm: float, z_um: float,
                            x_out_um: np.ndarray, y_out_um: np.ndarray, *, x0_um: float | None = None,
                            y0_um: float | None = None, medium_index: float = 1.0, cell_aperture: bool = True,
                            pad_factor: float = 2.0, workers: int = 2) -> np.ndarray:
    """Field at distance ``z_um`` on an arbitrary rectangular grid of output points (a zoom, e.g. a focal spot).

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Field at z = 0.
    dx_um, dy_um : float
        Sample pitch.
    wavelength_nm, z_um : float
        Vacuum wavelength and propagation distance.
    x_out_um, y_out_um : ndarray (px,), (py,)
        Output coordinates (any spacing, e.g. much finer than the cell pitch).
    x0_um, y0_um : float, optional
        Coordinates of sample ``[0, 0]`` (default: FFT-centred axes).
    medium_index : float
        Index of the propagation medium.
    cell_aperture : bool
        Include the cell-rectangle factor (piecewise-constant near field).
    pad_factor : float
        Padding against wrap-around of light diffracted out of the window (2 by default).

    Returns
    -------
    ndarray (py, px) complex128

    Notes
    -----
    ``U(x, y; z) = (1 / (M_x M_y)) sum_f A(f) H(f; z) s(f) exp(2 pi i f . (r - r0))`` with ``A`` the DFT of the
    samples and ``H`` the angular-spectrum transfer function, evaluated as two matrix products (a matrix DFT), so
    the output sampling is free.  No band limit is applied: the output grid is not periodic.

    References
    ----------
    Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 3.10; Soummer et al. 2007, Opt. Express 15, 15935
    (matrix Fourier transforms for arbitrary output sampling).
    """
    field = np.asarray(field)
    ny, nx = field.shape
    if x0_um is None:
        x0_um = -(nx // 2) * dx_um
    if y0_um is None:
        y0_um = -(ny // 2) * dy_um
    mx, my = fft_size(nx, pad_factor), fft_size(ny, pad_factor)
    buf = np.zeros((my, mx), dtype=np.complex128)
    buf[:ny, :nx] = field
    spec = sfft.fft2(buf, overwrite_x=True, workers=workers)
    fx = sfft.fftfreq(mx, dx_um)
    fy = sfft.fftfreq(my, dy_um)
    spec *= _transfer(fx, fy, wavelength_nm, z_um, medium_index, False, 0.0, 0.0)
    if cell_aperture:
        spec *= np.outer(np.sinc(dy_um * fy), np.sinc(dx_um * fx))
    x_out_um = np.asarray(x_out_um, dtype=np.float64)
    y_out_um = np.asarray(y_out_um, dtype=np.float64)
    ex = np.exp(2j * np.pi * fx[:, None] * (x_out_um[None, :] - x0_um))  # (mx, px)
    ey = np.exp(2j * np.pi * fy[:, None] * (y_out_um[None, :] - y0_um))  # (my, py)
    return (ey.T @ (spec @ ex)) / (float(mx) * float(my))
