"""Far field evaluated directly at chosen directions: a direct sum over the element's sites, or a zoom transform.

A spot's far-field value is computed from the near field by the Fraunhofer sum itself, at exactly the direction
asked for, so the result does not depend on FFT padding or on interpolation between FFT bins:

    A(u, v) = s(f) * sum_s E_s exp(-2 pi i (f_x x_s + f_y y_s)),      f = (u, v) n / wavelength,

with ``s(f) = sinc(dx f_x) sinc(dy f_y)`` the cell-aperture factor of a near field that is piecewise constant
over rectangular cells (as in :mod:`metalay.checks.grid`; optional).  Two layouts of the near field are accepted:

* sites given as parallel arrays ``(E, x_um, y_um)`` of any lattice: the sum runs over sites in chunks
  (memory bounded by ``chunk_elements`` complex numbers), vectorised inside a chunk;
* a field on a rectangular grid with axes ``x_um`` (nx,), ``y_um`` (ny,): the sum is separable and is evaluated as
  matrix products (``ey^T E ex``), either at a list of points or on an outer-product grid of directions (a zoom
  transform around a spot, any sampling).

Conventions are those of :mod:`metalay.checks.grid`: time dependence ``exp(-i omega t)``, a near-field phase increasing
along +x sends light to +u; direction cosines ``u = wavelength f_x / n`` in the exit medium of index ``n``.

Normalisation
-------------
:func:`spot_strength` turns an amplitude into a dimensionless figure that does not depend on sampling:
``|A|^2 / (S sum_s |E_s|^2)``, with ``S`` the number of sites (grid samples) that carry the element.  It is 1 for a
uniform plane wave over the element sent exactly towards that direction and equals the on-axis far-field intensity
relative to that ideal (a Strehl-like ratio).  The bin power of :func:`metalay.checks.grid.far_field` at an FFT bin
``f_k`` equals ``spot_strength * S / (M_x M_y)`` (``M`` the padded FFT sizes).

References
----------
Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.2 (Fraunhofer diffraction as a Fourier transform).
Soummer, Pueyo, Sivaramakrishnan & Vanderbei 2007, Opt. Express 15, 15935 (matrix Fourier transforms with free
output sampling).
"""

from __future__ import annotations

import numpy as np

from metalay.errors import MetalayError

__all__ = ["far_field_at_sites", "far_field_at_grid", "far_field_zoom", "spot_strength"]

#: Complex numbers held at once by the chunked site sum (about 64 MB of complex128).
CHUNK_ELEMENTS = 4_000_000


def _frequencies(u, v, wavelength_nm: float, medium_index: float):
    u = np.atleast_1d(np.asarray(u, dtype=np.float64))
    v = np.atleast_1d(np.asarray(v, dtype=np.float64))
    u, v = np.broadcast_arrays(u, v)
    if not (wavelength_nm > 0 and medium_index > 0):
        raise MetalayError(f"far field at points: wavelength_nm = {wavelength_nm!r} and medium_index = "
                           f"{medium_index!r} must be > 0")
    scale = float(medium_index) / (float(wavelength_nm) * 1e-3)
    return u.ravel() * scale, v.ravel() * scale, u.shape


def _cell_factor(fx, fy, cell_um):
    if cell_um is None:
        return 1.0
    dx, dy = float(cell_um[0]), float(cell_um[1])
    return np.sinc(dx * fx) * np.sinc(dy * fy)


def far_field_at_sites(field, x_um, y_um, u, v, wavelength_nm: float, *, medium_index: float = 1.0,
                       cell_um=None, chunk_elements: int = CHUNK_ELEMENTS) -> np.ndarray:
    """Far-field amplitude at directions ``(u, v)`` by a direct sum over sites of any lattice.

    Parameters
    ----------
    field : ndarray (S,) complex
        Near-field value of each site (e.g. the converted field of each element).
    x_um, y_um : ndarray (S,)
        Site centres in micrometres.
    u, v : array_like (broadcastable)
        Direction cosines in the exit medium at which to evaluate.
    wavelength_nm : float
        Vacuum wavelength.
    medium_index : float
        Index of the exit medium (``f = u n / wavelength``).
    cell_um : (float, float), optional
        Cell size ``(dx, dy)``: multiply by ``sinc(dx f_x) sinc(dy f_y)`` (piecewise-constant near field).
    chunk_elements : int
        Sites x points evaluated at once (bounds memory to about 16 bytes per element).

    Returns
    -------
    ndarray (shape of the broadcast u, v) complex128
        ``A(u, v) = s(f) sum_s E_s exp(-2 pi i f . r_s)``.

    Notes
    -----
    Cost ``S x P`` complex exponentials for ``P`` directions; use :func:`far_field_at_grid` when the sites form a
    rectangular grid (separable, much cheaper).
    """
    field = np.asarray(field).ravel()
    x_um = np.asarray(x_um, dtype=np.float64).ravel()
    y_um = np.asarray(y_um, dtype=np.float64).ravel()
    if not (field.size == x_um.size == y_um.size):
        raise MetalayError(f"far_field_at_sites: field ({field.size}), x_um ({x_um.size}) and y_um ({y_um.size}) "
                           "must have the same length")
    fx, fy, shape = _frequencies(u, v, wavelength_nm, medium_index)
    out = np.zeros(fx.size, dtype=np.complex128)
    step = max(1, int(chunk_elements) // max(1, fx.size))
    kx = -2.0 * np.pi * fx
    ky = -2.0 * np.pi * fy
    for s0 in range(0, field.size, step):  # chunks of sites (bounded memory), vectorised over points inside
        xs, ys, es = x_um[s0:s0 + step], y_um[s0:s0 + step], field[s0:s0 + step]
        ph = np.outer(xs, kx)
        ph += np.outer(ys, ky)
        out += es @ np.exp(1j * ph)
    out *= _cell_factor(fx, fy, cell_um)
    return out.reshape(shape)


def _axis_check(field, x_um, y_um):
    field = np.asarray(field)
    x_um = np.asarray(x_um, dtype=np.float64).ravel()
    y_um = np.asarray(y_um, dtype=np.float64).ravel()
    if field.ndim != 2 or field.shape != (y_um.size, x_um.size):
        raise MetalayError(f"far field on a grid: field shape {field.shape} must be (len(y_um), len(x_um)) = "
                           f"({y_um.size}, {x_um.size})")
    return field, x_um, y_um


def far_field_at_grid(field, x_um, y_um, u, v, wavelength_nm: float, *, medium_index: float = 1.0,
                      cell_um=None) -> np.ndarray:
    """Far-field amplitude at a list of directions for a near field sampled on a rectangular grid.

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Near field, row = y, column = x (zero outside the element).
    x_um, y_um : ndarray (nx,), (ny,)
        Sample coordinates (any spacing; the sum is exact for the given samples).
    u, v : array_like (broadcastable)
        Direction cosines.
    wavelength_nm, medium_index, cell_um :
        As in :func:`far_field_at_sites`.

    Returns
    -------
    ndarray (shape of the broadcast u, v) complex128

    Notes
    -----
    ``A_p = s(f_p) sum_y exp(-2 pi i f_{y,p} y) [sum_x E(y, x) exp(-2 pi i f_{x,p} x)]``: one matrix product
    ``E @ ex`` (``ny x nx`` by ``nx x P``) and a column-wise dot product with ``ey``.
    """
    field, x_um, y_um = _axis_check(field, x_um, y_um)
    fx, fy, shape = _frequencies(u, v, wavelength_nm, medium_index)
    ex = np.exp(-2j * np.pi * np.outer(x_um, fx))  # (nx, P)
    ey = np.exp(-2j * np.pi * np.outer(y_um, fy))  # (ny, P)
    g = field.astype(np.complex128, copy=False) @ ex  # (ny, P)
    out = np.einsum("yp,yp->p", ey, g)
    out *= _cell_factor(fx, fy, cell_um)
    return out.reshape(shape)


def far_field_zoom(field, x_um, y_um, u_axis, v_axis, wavelength_nm: float, *, medium_index: float = 1.0,
                   cell_um=None) -> np.ndarray:
    """Far-field amplitude on the outer-product grid of directions ``v_axis x u_axis`` (a zoom transform).

    Parameters
    ----------
    field : ndarray (ny, nx) complex
        Near field on a rectangular grid (row = y).
    x_um, y_um : ndarray (nx,), (ny,)
        Sample coordinates.
    u_axis, v_axis : ndarray (nu,), (nv,)
        Direction cosines of the output columns and rows (any spacing, e.g. a fine window around one spot).
    wavelength_nm, medium_index, cell_um :
        As in :func:`far_field_at_sites`.

    Returns
    -------
    ndarray (nv, nu) complex128
        ``ey^T E ex`` with ``ex[x, j] = exp(-2 pi i f_x[j] x)``, ``ey[y, i] = exp(-2 pi i f_y[i] y)``.

    References
    ----------
    Soummer et al. 2007, Opt. Express 15, 15935 (matrix Fourier transform).
    """
    field, x_um, y_um = _axis_check(field, x_um, y_um)
    scale = float(medium_index) / (float(wavelength_nm) * 1e-3)
    fx = np.asarray(u_axis, dtype=np.float64).ravel() * scale
    fy = np.asarray(v_axis, dtype=np.float64).ravel() * scale
    ex = np.exp(-2j * np.pi * np.outer(x_um, fx))
    ey = np.exp(-2j * np.pi * np.outer(y_um, fy))
    out = ey.T @ (field.astype(np.complex128, copy=False) @ ex)
    if cell_um is not None:
        out *= np.outer(np.sinc(float(cell_um[1]) * fy), np.sinc(float(cell_um[0]) * fx))
    return out


def spot_strength(amplitude, field, *, n_sites: int | None = None) -> np.ndarray:
    """Dimensionless on-axis spot strength ``|A|^2 / (S sum |E|^2)`` (1 = ideal plane wave over the element).

    Parameters
    ----------
    amplitude : array_like complex
        Far-field amplitudes from :func:`far_field_at_sites`, :func:`far_field_at_grid` or :func:`far_field_zoom`
        (without the cell factor, or with it when the ideal is meant to include it).
    field : ndarray complex
        The near field the amplitudes came from.
    n_sites : int, optional
        Number of sites carrying the element, ``S``; default: the number of non-zero samples of ``field``.

    Returns
    -------
    ndarray float64

    Notes
    -----
    By the Cauchy-Schwarz inequality ``|sum E_s e_s|^2 <= S sum |E_s|^2`` for unit-modulus ``e_s``, so the strength
    is at most 1 (without the cell factor), with equality for ``E_s`` proportional to ``exp(+2 pi i f . r_s)``.
    """
    field = np.asarray(field)
    s = int(np.count_nonzero(field)) if n_sites is None else int(n_sites)
    power = float(np.vdot(field.ravel(), field.ravel()).real)
    if s <= 0 or power <= 0:
        raise MetalayError("spot_strength: the near field carries no power")
    return np.abs(np.asarray(amplitude)) ** 2 / (s * power)
