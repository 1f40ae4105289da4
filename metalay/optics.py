"""Optical check of a written mask: near field from the decoded elements, far field, OAM, efficiency, crosstalk.

Pipeline (each step a pure function on arrays; :func:`check_optics` chains them)::

    read_mask (gdsread)  ->  decode_sites (decode)  ->  site_fields (Jones algebra per site)
        ->  rasterize (one sample per lattice site; hexagonal lattices as equal-area bricks)
        ->  far_field (grid) / angular_spectrum_points (grid, lenses)
        ->  power_budget, spot_metrics, oam_spectrum (oam), crosstalk_matrix, lens_metrics, read_charge (fringes)
        ->  plots (PNG) + report (HTML)

Model and conventions
---------------------
* Each site is a unit cell with the library's zeroth-order complex responses ``t_long``, ``t_short`` at the chosen
  wavelength; the cell rotated by ``theta`` has the Jones matrix ``R(-theta) diag(t_long, t_short) R(theta)``.
  For input ``|sigma>`` the output is ``(t_long + t_short)/2 |sigma> + (t_long - t_short)/2 exp(2 i sigma theta)
  |-sigma>``.  ``|sigma> = (x + i sigma y)/sqrt(2)``; time dependence ``exp(-i omega t)``.
* The near field is piecewise constant over each unit cell (see :mod:`metalay.grid`); powers are fractions of the
  power incident on the illuminated cells (``|t|^2`` is the zeroth-order power ratio, exit impedance included).
* Illuminated region: the sites of the design's aperture when a design is given, otherwise the occupied sites
  with enclosed holes filled.  Illuminated sites without an element transmit ``empty_t`` unconverted.
* Far-field angles are direction cosines in air (``u = wavelength f``), the medium the beam ends in after leaving
  a flat substrate.

References
----------
Pancharatnam 1956, Proc. Indian Acad. Sci. A 44, 247; Berry 1987, J. Mod. Opt. 34, 1401 (geometric phase).
Goodman 2005, Introduction to Fourier Optics, 3rd ed. (Fraunhofer and angular-spectrum propagation).
"""

from __future__ import annotations

import hashlib
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import ndimage

from . import fringes, grid, oam
from .decode import DecodedSites, decode_sites
from .errors import MetalayError

__all__ = [
    "SAFETY_NOTE",
    "OpticsTarget",
    "SiteFields",
    "NearField",
    "OpticsResult",
    "input_jones",
    "site_fields",
    "rasterize",
    "power_budget",
    "spot_fractions",
    "crosstalk_matrix",
    "lens_metrics",
    "target_from_design",
    "check_optics",
    "quick_check",
    "compile_check",
]

SAFETY_NOTE = ("This is a design aid. Verify every mask with full-wave simulation and with your facility's process "
               "rules before fabrication. Follow the laser-safety classes and chemical-safety rules of your site and "
               "local codes.")

SQRT3 = np.sqrt(3.0)


# ----------------------------------------------------------------------------------------------------------------
# Jones algebra on sites
# ----------------------------------------------------------------------------------------------------------------

def input_jones(polarization: str, *, design_sigma: int = 1) -> np.ndarray:
    """Normalised input Jones vector ``(E_x, E_y)``.

    Parameters
    ----------
    polarization : str
        ``"design"`` (the design's input spin), ``"spin+1"``, ``"spin-1"`` (``|sigma> = (x + i sigma y)/sqrt(2)``),
        ``"linear-x"``, ``"linear-y"`` or ``"linear:<angle_deg>"`` (angle from +x towards +y).
    design_sigma : {+1, -1}
        Spin the design was made for.
    """
    p = polarization.strip().lower()
    if p == "design":
        p = "spin+1" if design_sigma == 1 else "spin-1"
    if p in ("spin+1", "spin+"):
        return np.array([1.0, 1.0j]) / np.sqrt(2)
    if p in ("spin-1", "spin-"):
        return np.array([1.0, -1.0j]) / np.sqrt(2)
    if p == "linear-x":
        return np.array([1.0, 0.0], dtype=complex)
    if p == "linear-y":
        return np.array([0.0, 1.0], dtype=complex)
    if p.startswith("linear:"):
        try:
            a = np.radians(float(p.split(":", 1)[1]))
        except ValueError:
            a = None
        if a is not None and np.isfinite(a):
            return np.array([np.cos(a), np.sin(a)], dtype=complex)
    raise MetalayError(f"polarization = {polarization!r}; allowed: 'design', 'spin+1', 'spin-1', 'linear-x', "
                       "'linear-y', 'linear:<angle_deg>'")


@dataclass(frozen=True, eq=False)
class SiteFields:
    """Output field per site, split by circular polarisation (parallel arrays of length S, complex64).

    Attributes
    ----------
    designed : ndarray
        Component in the designed output polarisation ``|-sigma_d>`` (carries ``exp(i phi)``).
    other : ndarray
        Component in ``|sigma_d>``.
    converted : ndarray
        The converted part of ``designed``: ``a_sigma (t_long - t_short)/2 exp(2 i sigma_d theta)``.
    leaked_power : ndarray float32
        Unconverted power per site, ``(|a_+|^2 + |a_-|^2) |(t_long + t_short)/2|^2``.
    sigma : int
        Design spin ``sigma_d``.
    """

    designed: np.ndarray
    other: np.ndarray
    converted: np.ndarray
    leaked_power: np.ndarray
    sigma: int


def site_fields(t_long: np.ndarray, t_short: np.ndarray, rotation_rad: np.ndarray, jones_in: np.ndarray, *,
                sigma: int = 1) -> SiteFields:
    """Jones output of rotated cells for one input polarisation, in the circular basis.

    Parameters
    ----------
    t_long, t_short : ndarray (S,) complex
        Principal responses of each site's cell.
    rotation_rad : ndarray (S,)
        Cell rotation (long axis from +x).
    jones_in : ndarray (2,) complex
        Normalised input ``(E_x, E_y)``.
    sigma : {+1, -1}
        Design spin: the designed output is ``|-sigma>``.

    Returns
    -------
    SiteFields

    Notes
    -----
    With ``a_s = <s|E_in> = (E_x - i s E_y)/sqrt(2)``, ``leak = (t_l + t_s)/2`` and ``conv = (t_l - t_s)/2``::

        out_{-sigma} = a_{-sigma} leak + a_sigma conv exp(+2 i sigma theta)
        out_{sigma}  = a_sigma leak + a_{-sigma} conv exp(-2 i sigma theta)

    References
    ----------
    Bomzon, Kleiner & Hasman 2001, Opt. Lett. 26, 1424; Hasman et al. 2003, Appl. Phys. Lett. 82, 328
    (space-variant subwavelength gratings: Jones algebra of the geometric phase).
    """
    if sigma not in (1, -1):
        raise MetalayError(f"sigma = {sigma!r}; allowed: 1, -1")
    t_long = np.asarray(t_long, dtype=np.complex128)
    t_short = np.asarray(t_short, dtype=np.complex128)
    ex, ey = complex(jones_in[0]), complex(jones_in[1])
    a_s = (ex - 1j * sigma * ey) / np.sqrt(2)
    a_m = (ex + 1j * sigma * ey) / np.sqrt(2)
    leak = 0.5 * (t_long + t_short)
    conv = 0.5 * (t_long - t_short)
    ph = np.exp(2j * sigma * np.asarray(rotation_rad, dtype=np.float64))
    converted = a_s * conv * ph
    designed = a_m * leak + converted
    other = a_s * leak + a_m * conv * np.conj(ph)
    leaked_power = (abs(a_s) ** 2 + abs(a_m) ** 2) * np.abs(leak) ** 2
    return SiteFields(designed.astype(np.complex64), other.astype(np.complex64), converted.astype(np.complex64),
                      leaked_power.astype(np.float32), int(sigma))


# ----------------------------------------------------------------------------------------------------------------
# Site lattice -> sampled near field
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class NearField:
    """Near field on a rectangular sample grid (row = y, column = x).

    Attributes
    ----------
    x_um, y_um : ndarray (nx,), (ny,)
        Sample centres.
    dx_um, dy_um : float
        Sample pitch (square lattice: the period; hexagonal: p/2 by p sqrt(3)/2 bricks sampled twice per cell).
    designed, other, converted : ndarray (ny, nx) complex64
        Components as in :class:`SiteFields` (empty illuminated cells: ``empty_t`` unconverted; outside: 0).
    illuminated : ndarray (ny, nx) bool
    samples_per_site : int
        1 (square) or 2 (hexagonal bricks).
    decimation : int
        Block size used to shrink a large grid (1 = full resolution).
    note : str
        How the lattice was sampled (stated in the report).
    """

    x_um: np.ndarray
    y_um: np.ndarray
    dx_um: float
    dy_um: float
    designed: np.ndarray
    other: np.ndarray
    converted: np.ndarray
    illuminated: np.ndarray
    samples_per_site: int
    decimation: int
    note: str

    @property
    def n_illuminated_cells(self) -> float:
        return float(self.illuminated.sum()) / self.samples_per_site * self.decimation ** 2


def _site_pixels(i, j, lattice: str):
    """Grid (row, col) of each site: square one pixel; hexagonal two bricks (col c-1 and c with c = 2i + j%2)."""
    if lattice == "square":
        return j, i, None
    c = 2 * i + (j % 2)
    return j, c - 1, c


def rasterize(decoded: DecodedSites, fields: SiteFields, *, empty_t: complex = 1.0, jones_in=None,
              expected_ij=None, decimation: int = 1) -> NearField:
    """Place per-site fields on a sample grid (one sample per square-lattice site).

    Parameters
    ----------
    decoded : DecodedSites
        Site indices (``i``, ``j``), lattice and period.
    fields : SiteFields
        Per-site output (same order as ``decoded``).
    empty_t : complex
        Unconverted amplitude transmitted by an illuminated cell that has no element.
    jones_in : ndarray (2,), optional
        Input polarisation (needed to split ``empty_t`` into circular components); default the design spin.
    expected_ij : (ndarray, ndarray), optional
        Indices of every site of the design's aperture (illuminated region); default: occupied sites with
        enclosed holes filled (``scipy.ndimage.binary_fill_holes``).
    decimation : int
        Average blocks of ``decimation x decimation`` samples (for very large masks).

    Returns
    -------
    NearField

    Notes
    -----
    Hexagonal lattices (rows along x, odd rows shifted by p/2) are sampled on a ``p/2 x p sqrt(3)/2`` grid in
    which each cell is a brick of two samples: same centre and same area as the hexagonal cell, so powers and the
    far field near the axis are exact; the cell shape (brick instead of hexagon) only alters the cell-aperture
    factor at large angles.
    """
    p = decoded.period_nm * 1e-3
    ox, oy = decoded.origin_um
    ii, jj = decoded.i, decoded.j
    if expected_ij is not None:
        ei, ej = (np.asarray(a, dtype=np.int64) for a in expected_ij)
        all_i, all_j = np.concatenate([ii, ei]), np.concatenate([jj, ej])
    else:
        all_i, all_j = ii, jj
    if all_i.size == 0:
        raise MetalayError("optics: the mask has no decoded structures to illuminate")
    r, c0, c1 = _site_pixels(all_i, all_j, decoded.lattice)
    rmin, cmin = int(r.min()), int(c0.min())
    cmax = int((c1 if c1 is not None else c0).max())
    ny, nx = int(r.max()) - rmin + 1, cmax - cmin + 1
    sr, sc0, sc1 = _site_pixels(ii, jj, decoded.lattice)
    sr = sr - rmin
    cols = [sc0 - cmin] + ([sc1 - cmin] if sc1 is not None else [])
    occupied = np.zeros((ny, nx), bool)
    for cc in cols:
        occupied[sr, cc] = True
    if expected_ij is not None:
        er, ec0, ec1 = _site_pixels(ei, ej, decoded.lattice)
        illum = occupied.copy()
        for cc in [ec0] + ([ec1] if ec1 is not None else []):
            illum[er - rmin, cc - cmin] = True
    else:
        illum = ndimage.binary_fill_holes(occupied)
    if jones_in is None:
        jones_in = input_jones("design", design_sigma=fields.sigma)
    sig = fields.sigma
    a_s = (jones_in[0] - 1j * sig * jones_in[1]) / np.sqrt(2)
    a_m = (jones_in[0] + 1j * sig * jones_in[1]) / np.sqrt(2)
    empty = illum & ~occupied
    out = {}
    for name, vals, fill in (("designed", fields.designed, a_m * empty_t), ("other", fields.other, a_s * empty_t),
                             ("converted", fields.converted, 0.0)):
        arr = np.zeros((ny, nx), dtype=np.complex64)
        arr[empty] = fill
        for cc in cols:
            arr[sr, cc] = vals
        out[name] = arr
    if decoded.lattice == "square":
        dx, dy = p, p
        x = (cmin + np.arange(nx)) * p + ox
        spp = 1
        note = "square lattice: one sample per site (the cell's response over the whole cell)"
    else:
        dx, dy = p / 2, p * SQRT3 / 2
        x = (cmin + 0.5 + np.arange(nx)) * p / 2 + ox
        spp = 2
        note = ("hexagonal lattice: each cell resampled as a brick of two p/2 x p*sqrt(3)/2 samples with the "
                "cell's centre and area (exact powers; brick instead of hexagon aperture at large angles)")
    y = (rmin + np.arange(ny)) * dy + oy
    if decimation > 1:
        m = int(decimation)
        pad_y, pad_x = (-ny) % m, (-nx) % m

        def block(a, mean=True):
            a = np.pad(a, ((0, pad_y), (0, pad_x)))
            b = a.reshape(a.shape[0] // m, m, a.shape[1] // m, m)
            return b.mean(axis=(1, 3)) if mean else b.any(axis=(1, 3))

        out = {k: block(v).astype(np.complex64) for k, v in out.items()}
        illum = block(illum, mean=False)
        x = x[0] + (np.arange(out["designed"].shape[1]) * m + (m - 1) / 2) * dx
        y = y[0] + (np.arange(out["designed"].shape[0]) * m + (m - 1) / 2) * dy
        dx, dy = dx * m, dy * m
        note += f"; decimated by {m} x {m} block averages"
    return NearField(x_um=x, y_um=y, dx_um=float(dx), dy_um=float(dy), designed=out["designed"],
                     other=out["other"], converted=out["converted"], illuminated=illum, samples_per_site=spp,
                     decimation=int(decimation), note=note)


def power_budget(fields: SiteFields, n_illuminated: float, *, n_empty: float = 0.0, empty_t: complex = 1.0) -> dict:
    """Zeroth-order power budget as fractions of the power incident on the illuminated cells.

    Parameters
    ----------
    fields : SiteFields
        Per-site output of the elements.
    n_illuminated : float
        Number of illuminated cells (elements plus empty cells).
    n_empty : float
        Illuminated cells without an element (transmit ``empty_t`` unconverted).
    empty_t : complex
        Amplitude of an empty cell.

    Returns
    -------
    dict
        ``converted`` (cross-polarised, design-carrying), ``leakage`` (unconverted, any polarisation),
        ``designed_polarization`` and ``other_polarization`` (total power in ``|-sigma_d>`` and ``|sigma_d>``),
        ``zeroth_order_total`` (sum of both), ``not_in_zeroth_order`` (1 - that: absorption, reflection and higher
        lattice orders).

    Notes
    -----
    For circular input ``|sigma_d>``: converted ``= |(t_l - t_s)/2|^2`` and leakage ``= |(t_l + t_s)/2|^2`` per
    cell; their sum is ``(|t_l|^2 + |t_s|^2)/2``.
    """
    n = float(n_illuminated)
    if n <= 0:
        raise MetalayError("optics: no illuminated cells")
    d = float(np.sum(np.abs(fields.designed.astype(np.complex128)) ** 2))
    o = float(np.sum(np.abs(fields.other.astype(np.complex128)) ** 2))
    c = float(np.sum(np.abs(fields.converted.astype(np.complex128)) ** 2))
    lk = float(np.sum(fields.leaked_power, dtype=np.float64))
    e = float(n_empty) * abs(empty_t) ** 2
    return {
        "converted": c / n,
        "leakage": (lk + e) / n,
        "designed_polarization": (d + 0.0) / n + 0.0,
        "other_polarization": o / n,
        "zeroth_order_total": (d + o) / n,
        "not_in_zeroth_order": 1.0 - (d + o) / n,
        "empty_cells": float(n_empty),
        "illuminated_cells": n,
    }
