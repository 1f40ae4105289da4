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
* The near field is piecewise constant over each unit cell (see :mod:`metalay.checks.grid`); powers are fractions of the
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
from types import SimpleNamespace

import numpy as np
from scipy import ndimage

from metalay.checks import farpoints, fringes, grid, oam
from metalay.checks.decode import DecodedSites
from metalay.checks.openings import decode_written, tone_of, written_layer
from metalay.errors import LibraryError, MetalayError
from metalay.util._memory import keep_freed_memory

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
    "judged_figures",
    "lens_metrics",
    "target_from_design",
    "ideal_responses",
    "site_xy",
    "facing_of",
    "beam_frame_sites",
    "optics_verdicts",
    "near_field_decimation",
    "json_ready",
    "spot_centres",
    "Evaluation",
    "evaluate_elements",
    "OpticsOptions",
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
    # single precision throughout: the fields are stored as complex64 anyway (relative error ~1e-7)
    t_long = np.asarray(t_long, dtype=np.complex64)
    t_short = np.asarray(t_short, dtype=np.complex64)
    ex, ey = complex(jones_in[0]), complex(jones_in[1])
    a_s = np.complex64((ex - 1j * sigma * ey) / np.sqrt(2))
    a_m = np.complex64((ex + 1j * sigma * ey) / np.sqrt(2))
    leak = np.float32(0.5) * (t_long + t_short)
    conv = np.float32(0.5) * (t_long - t_short)
    two_theta = (2.0 * sigma) * np.asarray(rotation_rad, dtype=np.float64)
    ph = np.empty(two_theta.shape, dtype=np.complex64)
    ph.real = np.cos(two_theta)
    ph.imag = np.sin(two_theta)
    converted = (a_s * conv) * ph
    designed = a_m * leak + converted
    other = a_s * leak + (a_m * conv) * np.conj(ph)
    leaked_power = np.float32(abs(a_s) ** 2 + abs(a_m) ** 2) * (leak.real ** 2 + leak.imag ** 2)
    return SiteFields(designed, other, converted, leaked_power.astype(np.float32, copy=False), int(sigma))


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
    cells_illuminated: int = 0
    cells_empty: int = 0

    @property
    def n_illuminated_cells(self) -> float:
        """Illuminated unit cells (elements plus empty cells), counted before any decimation."""
        return float(self.cells_illuminated)

    @property
    def cell_area_um2(self) -> float:
        """Area of one unit cell."""
        return self.dx_um * self.dy_um * self.samples_per_site / self.decimation ** 2


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
    sr, cols, occupied, illum, (rmin, cmin) = _site_grid(decoded, expected_ij)
    ny, nx = occupied.shape
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
    n_cells = int(illum.sum()) // spp
    n_empty = int(empty.sum()) // spp
    if decimation > 1:
        m = int(decimation)
        out, illum, x, y = _decimate(out, illum, x, y, dx, dy, m)
        dx, dy = dx * m, dy * m
        note += f"; decimated by {m} x {m} block averages"
    return NearField(x_um=x, y_um=y, dx_um=float(dx), dy_um=float(dy), designed=out["designed"],
                     other=out["other"], converted=out["converted"], illuminated=illum, samples_per_site=spp,
                     decimation=int(decimation), note=note, cells_illuminated=n_cells, cells_empty=n_empty)


def _site_grid(decoded: DecodedSites, expected_ij):
    """Sample positions of the decoded sites and the occupied / illuminated masks of the grid.

    Returns the site rows, the site columns (one or two arrays), the occupied and illuminated masks (ny, nx) and
    the grid's first (row, column).
    """
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
    return sr, cols, occupied, illum, (rmin, cmin)


def _decimate(out: dict, illum, x, y, dx: float, dy: float, m: int):
    """Block averages of ``m x m`` samples (illuminated where any sample is) and the block-centre axes."""
    ny, nx = illum.shape
    pad_y, pad_x = (-ny) % m, (-nx) % m

    def block(a, mean=True):
        a = np.pad(a, ((0, pad_y), (0, pad_x)))
        b = a.reshape(a.shape[0] // m, m, a.shape[1] // m, m)
        return b.mean(axis=(1, 3)) if mean else b.any(axis=(1, 3))

    out = {k: block(v).astype(np.complex64) for k, v in out.items()}
    illum = block(illum, mean=False)
    x = x[0] + (np.arange(out["designed"].shape[1]) * m + (m - 1) / 2) * dx
    y = y[0] + (np.arange(out["designed"].shape[0]) * m + (m - 1) / 2) * dy
    return out, illum, x, y


def power_budget(fields: SiteFields, n_illuminated: float, *, n_empty: float = 0.0, empty_t: complex = 1.0,
                 jones_in=None) -> dict:
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
    jones_in : ndarray (2,), optional
        Input polarisation (default: the design spin).

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
    if jones_in is None:
        jones_in = input_jones("design", design_sigma=fields.sigma)
    sig = fields.sigma
    a_s = (jones_in[0] - 1j * sig * jones_in[1]) / np.sqrt(2)
    a_m = (jones_in[0] + 1j * sig * jones_in[1]) / np.sqrt(2)
    e = float(n_empty) * abs(empty_t) ** 2
    d += e * abs(a_m) ** 2
    o += e * abs(a_s) ** 2
    return {
        "converted": c / n,
        "leakage": (lk + e) / n,
        "designed_polarization": d / n,
        "other_polarization": o / n,
        "zeroth_order_total": (d + o) / n,
        "not_in_zeroth_order": max(0.0, 1.0 - (d + o) / n),
        "empty_cells": float(n_empty),
        "illuminated_cells": n,
    }


# ----------------------------------------------------------------------------------------------------------------
# What the design intends
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class OpticsTarget:
    """What the mask is meant to do, as far as the optical check needs it.

    Attributes
    ----------
    wavelength_nm : float
        Wavelength of the check (vacuum).
    sigma : {+1, -1}
        Design input spin; the designed beam is in ``|-sigma>``.
    charge : int or None
        Topological charge about the beam axis (vortex terms plus ``2 sigma q`` of q-plate terms); None when the
        design has no single axis charge (multiplexed or imported phase maps).
    center_um : (float, float)
        Vortex axis in the mask plane.
    direction : (float, float)
        Direction cosines ``(u, v)`` of the designed beam (sum of the tilt terms; in air).
    focal_length_um : float or None
        Lens focal length (first lens term).
    lens_medium_index : float
        Medium the lens focuses in.
    channels : tuple of (charge, u, v)
        Multiplexed channels.
    terms : tuple
        All phase terms (target phase).
    remove_terms : tuple
        Terms removed before the OAM spectrum and the interferogram (tilt, lens, axicon).
    aperture_diameter_um : float or None
        Design aperture (for reporting; the check measures the illuminated area itself).
    """

    wavelength_nm: float
    sigma: int = 1
    charge: int | None = 0
    center_um: tuple = (0.0, 0.0)
    direction: tuple = (0.0, 0.0)
    focal_length_um: float | None = None
    lens_medium_index: float = 1.0
    channels: tuple = ()
    terms: tuple = ()
    remove_terms: tuple = ()
    aperture_diameter_um: float | None = None


def target_from_design(design, *, wavelength_nm: float | None = None) -> OpticsTarget:
    """Build an :class:`OpticsTarget` from a validated design (:class:`metalay.design.spec.Design`)."""
    from metalay.design.phase import Axicon, Lens, Multiplex, QPlate, Tilt, Vortex

    charge = 0.0
    single_axis = True
    center = (0.0, 0.0)
    u = v = 0.0
    focal, lens_n = None, 1.0
    channels = []
    remove = []
    for t in design.terms:  # loop over phase terms (short axis)
        if isinstance(t, Vortex):
            charge += t.charge
            center = (t.center_x_um, t.center_y_um)
        elif isinstance(t, QPlate):
            charge += 2 * design.sigma * t.q
        elif isinstance(t, Tilt):
            s = np.sin(np.radians(t.angle_deg))
            u += s * np.cos(np.radians(t.azimuth_deg))
            v += s * np.sin(np.radians(t.azimuth_deg))
            remove.append(t)
        elif isinstance(t, Lens):
            if focal is None:
                focal, lens_n = t.focal_length_um, t.medium_index
            remove.append(t)
        elif isinstance(t, Axicon):
            remove.append(t)
        elif isinstance(t, Multiplex):
            single_axis = False
            for ch in t.channels:
                s = np.sin(np.radians(ch.angle_deg))
                channels.append((int(ch.charge), float(s * np.cos(np.radians(ch.azimuth_deg))),
                                 float(s * np.sin(np.radians(ch.azimuth_deg)))))
        else:  # imported phase map: no single known axis charge
            single_axis = False
    q = round(charge)
    return OpticsTarget(
        wavelength_nm=float(wavelength_nm or design.wavelength_nm), sigma=int(design.sigma),
        charge=int(q) if single_axis and abs(charge - q) < 1e-9 else None, center_um=tuple(map(float, center)),
        direction=(float(u), float(v)), focal_length_um=focal, lens_medium_index=float(lens_n),
        channels=tuple(channels), terms=tuple(design.terms), remove_terms=tuple(remove),
        aperture_diameter_um=float(design.aperture.diameter_um or 2 * max(design.aperture.half_extent_um)))


def _target_phase(terms, x_um, y_um, target: OpticsTarget) -> np.ndarray:
    from metalay.design.phase import target_phase

    return target_phase(terms, x_um, y_um, wavelength_nm=target.wavelength_nm, sigma=target.sigma)


# ----------------------------------------------------------------------------------------------------------------
# Far-field metrics
# ----------------------------------------------------------------------------------------------------------------

def _disk_sum(ff: grid.FarField, u0: float, v0: float, radius_u: float) -> float:
    """Power in the far-field disk ``(u - u0)^2 + (v - v0)^2 < radius_u^2`` (only the rows/cols it touches)."""
    cols = np.flatnonzero(np.abs(ff.u - u0) <= radius_u)
    rows = np.flatnonzero(np.abs(ff.v - v0) <= radius_u)
    if cols.size == 0 or rows.size == 0:
        return 0.0
    sub = ff.power[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    du = ff.u[cols[0]:cols[-1] + 1] - u0
    dv = ff.v[rows[0]:rows[-1] + 1] - v0
    inside = dv[:, None] ** 2 + du[None, :] ** 2 < radius_u ** 2
    return float(sub[inside].sum(dtype=np.float64))


def _evanescent_sum(ff: grid.FarField) -> float:
    """Power in bins with ``u^2 + v^2 >= 1`` (evanescent directions), summed over the grid's corners only.

    A bin can be evanescent only where ``|u| >= sqrt(1 - v_max^2)`` and ``|v| >= sqrt(1 - u_max^2)``, so only
    those rows and columns are masked (the same sum as masking the whole grid).
    """
    umax, vmax = float(np.max(np.abs(ff.u))), float(np.max(np.abs(ff.v)))
    cols = np.flatnonzero(np.abs(ff.u) >= np.sqrt(max(0.0, 1.0 - vmax * vmax)) * (1 - 1e-12))
    rows = np.flatnonzero(np.abs(ff.v) >= np.sqrt(max(0.0, 1.0 - umax * umax)) * (1 - 1e-12))
    if cols.size == 0 or rows.size == 0:
        return 0.0
    sub = ff.power[np.ix_(rows, cols)]
    outside = ff.v[rows][:, None] ** 2 + ff.u[cols][None, :] ** 2 >= 1.0
    return float(sub[outside].sum(dtype=np.float64))


def spot_fractions(ff: grid.FarField, centres, radius_u: float) -> dict:
    """Share of the far-field power of one polarisation component in disks about the given directions.

    Parameters
    ----------
    ff : FarField
    centres : dict name -> (u, v)
        Directions of the spots (designed order, zero order, channels...).
    radius_u : float
        Disk radius in direction-cosine units.

    Returns
    -------
    dict
        One entry per centre, plus ``outside_spots`` (propagating power elsewhere), ``evanescent`` (bins with
        ``u^2 + v^2 >= 1``) and ``higher_lattice_orders`` (power outside the sampled Brillouin zone), all as
        fractions of the component's near-field power.
    """
    out = {name: _disk_sum(ff, u0, v0, radius_u) for name, (u0, v0) in centres.items()}
    total = float(ff.power.sum(dtype=np.float64))
    evan = _evanescent_sum(ff)
    out["outside_spots"] = total - evan - sum(out.values())
    out["evanescent"] = evan
    out["higher_lattice_orders"] = 1.0 - total
    return out


def _peak_near(ff: grid.FarField, u0: float, v0: float, radius_u: float):
    """Brightest bin within ``radius_u`` of (u0, v0), refined by a 3-point parabola per axis."""
    cols = np.flatnonzero(np.abs(ff.u - u0) <= radius_u)
    rows = np.flatnonzero(np.abs(ff.v - v0) <= radius_u)
    sub = ff.power[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    r, c = np.unravel_index(np.argmax(sub), sub.shape)
    r, c = r + rows[0], c + cols[0]

    def refine(a, b, cc):
        den = a - 2 * b + cc
        return 0.5 * (a - cc) / den if den != 0 else 0.0

    p = ff.power
    fu = refine(float(p[r, c - 1]), float(p[r, c]), float(p[r, c + 1])) if 0 < c < p.shape[1] - 1 else 0.0
    fv = refine(float(p[r - 1, c]), float(p[r, c]), float(p[r + 1, c])) if 0 < r < p.shape[0] - 1 else 0.0
    return float(ff.u[c] + fu * ff.du), float(ff.v[r] + fv * ff.dv), float(p[r, c])


def _centroid_near(ff: grid.FarField, u0: float, v0: float, radius_u: float):
    """Power-weighted centre of the far field within ``radius_u`` of (u0, v0) (works for rings as well)."""
    cols = np.flatnonzero(np.abs(ff.u - u0) <= radius_u)
    rows = np.flatnonzero(np.abs(ff.v - v0) <= radius_u)
    sub = ff.power[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1].astype(np.float64)
    uu, vv = ff.u[cols[0]:cols[-1] + 1], ff.v[rows[0]:rows[-1] + 1]
    w = sub * ((uu[None, :] - u0) ** 2 + (vv[:, None] - v0) ** 2 < radius_u ** 2)
    tot = w.sum()
    if tot <= 0:
        return float(u0), float(v0)
    return float((w.sum(axis=0) * uu).sum() / tot), float((w.sum(axis=1) * vv).sum() / tot)


CROSSTALK_METHOD = ("spot values: direct Fraunhofer sum over the {over} at each channel direction (no FFT, no "
                    "padding, no interpolation); spot positions: FFT peak (padding {pad:g}) refined by a parabola")


def _spot_matrix(channels, wavelength_nm: float, field, x_um, y_um, *, grid_axes: bool) -> np.ndarray:
    """``M[k, m]``: spot strength at channel ``m``'s direction with the conjugate probe of channel ``k``."""
    u = np.array([ch[1] for ch in channels], dtype=np.float64)
    v = np.array([ch[2] for ch in channels], dtype=np.float64)
    c = len(channels)
    mat = np.zeros((c, c))
    if grid_axes:
        phi = np.arctan2(y_um[:, None], x_um[None, :])
    else:
        phi = np.arctan2(y_um, x_um)
    n_sites = max(1, int(np.count_nonzero(field)))
    for k, (lk, _, _) in enumerate(channels):  # loop over channels (short axis)
        probe = field * np.exp(-1j * lk * phi)
        if grid_axes:
            amp = farpoints.far_field_at_grid(probe, x_um, y_um, u, v, wavelength_nm)
        else:
            amp = farpoints.far_field_at_sites(probe, x_um, y_um, u, v, wavelength_nm)
        mat[k] = farpoints.spot_strength(amp, probe, n_sites=n_sites)
    return mat


def crosstalk_matrix(near: NearField, channels, wavelength_nm: float, *, radius_u: float,
                     pad_factor: float = 2.0, workers: int = 2, sites=None) -> dict:
    """Channel crosstalk of a multiplexed (demultiplexing) mask.

    Each channel ``k`` (charge ``l_k``, direction ``(u_k, v_k)``) is probed by illuminating the mask with the
    conjugate vortex ``exp(-i l_k phi)``: channel ``k`` then forms a bright, solid spot at its direction while the
    other channels keep a vortex (dark centre) at theirs. The value at each channel direction is computed by the
    Fraunhofer sum itself at exactly that direction (:mod:`metalay.checks.farpoints`), so it does not depend on
    FFT padding or on interpolation between FFT bins (which fills the on-axis null of a mismatched vortex and
    understated isolation by 10-20 dB).

    Parameters
    ----------
    near : NearField
    channels : sequence of (charge, u, v)
    wavelength_nm : float
    radius_u : float
        Search radius for each spot's measured position.
    pad_factor : float
        FFT padding used for the spot positions only.
    workers : int
    sites : (field, x_um, y_um), optional
        The designed output of every element (S,) at its lattice site: the spot values are then a direct sum over
        the elements (exact for any lattice and for a decimated ``near``); default the samples of ``near``.

    Returns
    -------
    dict
        ``matrix`` (C x C list: on-axis spot strength ``|A|^2 / (S sum |E|^2)`` at spot ``m`` when probing
        channel ``k``; 1 = an ideal plane wave from the whole element), ``matrix_db`` (relative to each row's
        diagonal), ``isolation_db`` per channel (diagonal over the largest off-diagonal entry of its row),
        ``worst_isolation_db``, ``column_isolation_db`` (spot ``m``'s own probe over the strongest other probe
        landing there), ``channel_power`` (the diagonal) and ``power_spread_db`` (max over min), ``positions``
        (measured (u, v) of each probed spot), ``position_error`` (distance to the design in direction cosines),
        ``position_error_deg`` and ``method``.

    References
    ----------
    Mair et al. 2001, Nature 412, 313 (conjugate-vortex detection of OAM states: only the matching charge gives
    an on-axis spot). Goodman 2005, Introduction to Fourier Optics, sec. 4.2 (Fraunhofer sum).
    """
    if sites is not None:
        field, xs, ys = (np.asarray(a) for a in sites)
        mat = _spot_matrix(channels, wavelength_nm, field.astype(np.complex128), xs, ys, grid_axes=False)
        over = "elements (one term per written element at its lattice site)"
    else:
        mat = _spot_matrix(channels, wavelength_nm, near.designed.astype(np.complex128), near.x_um, near.y_um,
                           grid_axes=True)
        over = "near-field samples"
    phi = np.arctan2(near.y_um[:, None], near.x_um[None, :])
    c = len(channels)
    pos = np.zeros((c, 2))
    for k, (lk, uk, vk) in enumerate(channels):  # loop over channels (short axis)
        probe = near.designed * np.exp(-1j * lk * phi).astype(np.complex64)
        ff = grid.far_field(probe, near.dx_um, near.dy_um, wavelength_nm, x0_um=float(near.x_um[0]),
                            y0_um=float(near.y_um[0]), pad_factor=pad_factor, workers=workers)
        pu, pv, _ = _peak_near(ff, uk, vk, radius_u)
        pos[k] = (pu, pv)
        del ff, probe
    design = np.array([[u, v] for _, u, v in channels])
    err = np.hypot(*(pos - design).T)
    ang_meas = np.degrees(np.arcsin(np.clip(np.hypot(*pos.T), 0, 1)))
    ang_design = np.degrees(np.arcsin(np.clip(np.hypot(*design.T), 0, 1)))
    out = isolation_figures(mat)
    out.update({"positions": pos.tolist(), "design_positions": design.tolist(), "position_error": err.tolist(),
                "position_error_deg": np.abs(ang_meas - ang_design).tolist(),
                "charges": [int(ch[0]) for ch in channels],
                "method": CROSSTALK_METHOD.format(over=over, pad=pad_factor)})
    return out


def isolation_figures(mat: np.ndarray) -> dict:
    """Isolation figures of a spot matrix ``M[k, m]`` (probe ``k``, spot ``m``): the matrix, in dB relative to each
    row's diagonal, per-channel and per-column isolation (dB), the diagonal and its spread (dB)."""
    c = mat.shape[0]
    diag = np.diag(mat).copy()
    with np.errstate(divide="ignore"):
        rel_db = 10 * np.log10(np.maximum(mat, 1e-300) / np.maximum(diag[:, None], 1e-300))
        off = np.where(np.eye(c, dtype=bool), -np.inf, mat)
        iso = (10 * np.log10(np.maximum(diag, 1e-300) / np.maximum(off.max(axis=1), 1e-300)) if c > 1
               else np.full(c, np.inf))
        col = (10 * np.log10(np.maximum(diag, 1e-300) / np.maximum(off.max(axis=0), 1e-300)) if c > 1
               else np.full(c, np.inf))
    spread = float(10 * np.log10(max(diag.max(), 1e-300) / max(diag.min(), 1e-300))) if c else None
    return {"matrix": mat.tolist(), "matrix_db": rel_db.tolist(), "isolation_db": iso.tolist(),
            "worst_isolation_db": float(iso.min()) if c else None, "column_isolation_db": col.tolist(),
            "worst_column_isolation_db": float(col.min()) if c else None, "channel_power": diag.tolist(),
            "power_spread_db": spread}


def lens_metrics(near: NearField, wavelength_nm: float, focal_length_um: float, *, ideal: np.ndarray | None = None,
                 medium_index: float = 1.0, center_um=(0.0, 0.0), n_out: int = 121, pad_factor: float | None = None,
                 workers: int = 2) -> dict:
    """Focal spot of a lens mask: FWHM, first dark ring, Strehl ratio and focusing efficiency.

    Parameters
    ----------
    near : NearField
        The designed component is propagated.
    wavelength_nm, focal_length_um : float
    ideal : ndarray (ny, nx) complex, optional
        Aberration-free field on the same grid (same amplitude, exact design phase) for the Strehl ratio.
    medium_index : float
        Medium between mask and focus.
    center_um : (float, float)
        Expected lateral focus position.
    n_out : int
        Samples per side of the focal-plane window (``+-3`` Airy radii).
    pad_factor : float, optional
        Padding of the propagation (default 2, or 1 for grids above 2048 samples per side).

    Returns
    -------
    dict
        ``fwhm_x_um``, ``fwhm_y_um``, ``fwhm_airy_um`` (``0.514 lambda / NA``), ``first_dark_ring_um`` and
        ``airy_radius_um`` (``0.61 lambda / NA``), ``numerical_aperture``, ``strehl`` (peak over the ideal peak),
        ``focusing_efficiency`` (power within ``3 x FWHM`` of the peak over the incident power),
        ``peak_position_um``, ``diameter_um``, ``profile`` (radius, normalised intensity) for plots.

    Notes
    -----
    Airy pattern: ``I(r) = [2 J_1(v)/v]^2`` with ``v = 2 pi NA r / lambda``; first zero ``0.61 lambda / NA``,
    full width at half maximum ``0.514 lambda / NA`` (paraxially ``1.22 lambda f / D`` and ``1.03 lambda f / D``).

    References
    ----------
    Born & Wolf, Principles of Optics, 7th ed., sec. 8.5.2 (Airy pattern) and sec. 9.1 (Strehl ratio).
    From memory: Arbabi et al. 2015, Nat. Commun. 6, 7069 (focusing efficiency within a radius of 3 x FWHM).
    """
    lam = wavelength_nm * 1e-3 / medium_index
    area = near.n_illuminated_cells * near.cell_area_um2
    diameter = 2 * np.sqrt(area / np.pi)
    na = np.sin(np.arctan(diameter / (2 * focal_length_um)))
    r0 = 0.61 * lam / na
    half = 3.0 * r0
    xs = center_um[0] + np.linspace(-half, half, n_out)
    ys = center_um[1] + np.linspace(-half, half, n_out)
    if pad_factor is None:
        pad_factor = 1.0 if max(near.designed.shape) > 2048 else 2.0
    kw = dict(x0_um=float(near.x_um[0]), y0_um=float(near.y_um[0]), medium_index=medium_index,
              pad_factor=pad_factor, workers=workers)
    u = grid.angular_spectrum_points(near.designed, near.dx_um, near.dy_um, wavelength_nm, focal_length_um, xs, ys,
                                     **kw)
    inten = np.abs(u) ** 2
    out = focal_spot_figures(inten, xs, ys, lam_medium_um=lam, numerical_aperture=na, area_um2=area)
    if ideal is not None:
        ui = grid.angular_spectrum_points(ideal, near.dx_um, near.dy_um, wavelength_nm, focal_length_um, xs, ys,
                                          **kw)
        out["strehl"] = out["peak_intensity"] / float(np.max(np.abs(ui) ** 2))
    out.update({"diameter_um": float(diameter), "focal_length_um": float(focal_length_um)})
    out["profile"] = out.pop("profile")
    return out


def _fwhm(profile, axis) -> float:
    """Full width at half maximum of a sampled profile about its maximum (linear interpolation at half height)."""
    half_v = profile.max() / 2
    k = int(np.argmax(profile))
    lo = k
    while lo > 0 and profile[lo] > half_v:
        lo -= 1
    hi = k
    while hi < profile.size - 1 and profile[hi] > half_v:
        hi += 1
    xl = np.interp(half_v, [profile[lo], profile[lo + 1]], [axis[lo], axis[lo + 1]])
    xh = np.interp(half_v, [profile[hi], profile[hi - 1]], [axis[hi], axis[hi - 1]])
    return float(xh - xl)


def focal_spot_figures(inten: np.ndarray, xs: np.ndarray, ys: np.ndarray, *, lam_medium_um: float,
                       numerical_aperture: float, area_um2: float) -> dict:
    """Focal-spot figures of an intensity window ``inten`` (ny, nx) on uniform axes ``xs``, ``ys`` (um) spanning
    ``+-3`` Airy radii: FWHM, first dark ring, focusing efficiency (power within ``3 x FWHM`` of the peak over the
    incident power ``area_um2``), peak; ``strehl`` None (the caller's ratio to its ideal peak)."""
    lam, na = lam_medium_um, numerical_aperture
    r0 = 0.61 * lam / na
    half = 3.0 * r0
    r, c = np.unravel_index(np.argmax(inten), inten.shape)
    peak = float(inten[r, c])
    fx = _fwhm(inten[r, :], xs)
    fy = _fwhm(inten[:, c], ys)
    rr = np.hypot(xs[None, :] - xs[c], ys[:, None] - ys[r])
    step = xs[1] - xs[0]
    bins = np.rint(rr / step).astype(int)
    prof = np.bincount(bins.ravel(), inten.ravel()) / np.maximum(np.bincount(bins.ravel()), 1)
    radius = np.arange(prof.size) * step
    valid = radius <= half
    prof, radius = prof[valid], radius[valid]
    rising = np.flatnonzero(np.diff(prof) > 0)
    first_dark = float("nan")
    if rising.size:
        k = int(rising[0])
        first_dark = float(radius[k])
        if 0 < k < prof.size - 1:  # parabolic refinement of the minimum
            a, b, cc = prof[k - 1], prof[k], prof[k + 1]
            den = a - 2 * b + cc
            if den > 0:
                first_dark += float(0.5 * (a - cc) / den * step)
    fwhm_mean = 0.5 * (fx + fy)
    eff = float(inten[rr < 3 * fwhm_mean].sum() * step * step / area_um2)
    return {"fwhm_x_um": fx, "fwhm_y_um": fy, "fwhm_airy_um": float(0.514 * lam / na),
            "first_dark_ring_um": first_dark, "airy_radius_um": float(r0), "numerical_aperture": float(na),
            "strehl": None, "focusing_efficiency": eff, "peak_position_um": [float(xs[c]), float(ys[r])],
            "peak_intensity": peak,
            "profile": {"radius_um": radius.tolist(), "intensity": (prof / max(prof.max(), 1e-300)).tolist()}}


# ----------------------------------------------------------------------------------------------------------------
# Entry points
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class OpticsResult:
    """Outcome of :func:`check_optics`.

    Attributes
    ----------
    figures : dict
        JSON-ready numbers (power budget, spots, OAM, crosstalk, lens, charge reading, decoding statistics).
    images : dict name -> (caption, PNG bytes)
    html : str or None
        Single-page report (when plots were made).
    files : dict name -> {"path", "sha256", "bytes"}
        Files written to ``out_dir`` (empty when no folder was given).
    timings : dict
        Seconds per stage (not written to files: they vary between runs).
    notes : tuple of str
        Modelling notes and approximations.
    near : NearField or None
    far : FarField or None
        Arrays of the last run (kept when ``keep_arrays`` is true).
    """

    figures: dict
    images: dict
    html: str | None
    files: dict
    timings: dict
    notes: tuple
    near: NearField | None = None
    far: grid.FarField | None = None
    sections: tuple = ()

    def __str__(self) -> str:
        v = self.figures.get("verdicts", {})
        b = self.figures.get("power_budget", {})
        return (f"optical check: verdict {str(v.get('verdict', '?')).upper()}; converted "
                f"{b.get('converted', float('nan')):.4f} of incident; {len(self.files)} files written")


def ideal_responses(n_cells: int):
    """Perfect half-wave cells: ``t_long = 1``, ``t_short = -1`` (full conversion, no leakage)."""
    return np.ones(n_cells, complex), -np.ones(n_cells, complex)


def site_xy(decoded: DecodedSites):
    """Lattice-site coordinates (um) of the decoded sites (ideal positions, not the measured centres)."""
    p = decoded.period_nm * 1e-3
    if decoded.lattice == "square":
        return decoded.i * p + decoded.origin_um[0], decoded.j * p + decoded.origin_um[1]
    return ((decoded.i + 0.5 * (decoded.j % 2)) * p + decoded.origin_um[0],
            decoded.j * p * SQRT3 / 2 + decoded.origin_um[1])


def near_field_decimation(decoded: DecodedSites, max_side: int) -> tuple[int, int]:
    """Block size ``m`` that keeps the near-field grid side at most ``max_side``, and the full-resolution side."""
    r_, c0_, c1_ = _site_pixels(decoded.i, decoded.j, decoded.lattice)
    side = max(int(np.ptp(r_)) + 1, int(np.ptp(c1_ if c1_ is not None else c0_)) + 2)
    return (int(np.ceil(side / max_side)) if side > max_side else 1), side


def _block(a: np.ndarray, m: int) -> np.ndarray:
    if m <= 1:
        return a
    ny, nx = (a.shape[0] // m) * m, (a.shape[1] // m) * m
    return a[:ny, :nx].reshape(ny // m, m, nx // m, m).mean(axis=(1, 3))


def _sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 22), b""):
            h.update(chunk)
    return h.hexdigest()


def json_ready(obj):
    """``obj`` with numpy scalars as Python numbers, non-finite floats as None, tuples as lists (for JSON)."""
    if isinstance(obj, dict):
        return {str(k): json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_ready(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


#: Values of :attr:`OpticsOptions.bias_response`.
BIAS_RESPONSES = ("as-written", "nominal")


def _bias_settings(opt: "OpticsOptions", design) -> tuple:
    """Bias response, truncation and cache folder: the options, else the design's ``[checks]``, else defaults."""
    checks = getattr(design, "checks", None)
    response = opt.bias_response or getattr(checks, "bias_response", None) or "as-written"
    if response not in BIAS_RESPONSES:
        raise MetalayError(f"bias_response = {response!r}; allowed: {', '.join(BIAS_RESPONSES)}")
    harmonics = opt.bias_harmonics
    if harmonics is None and getattr(checks, "bias_harmonics", None) is not None:
        harmonics = (int(checks.bias_harmonics),) * 2
    return response, harmonics, opt.cell_cache or getattr(checks, "cell_cache", None)


def _biased_responses(lib, t_long, t_short, decoded, bias_nm: float, notes: list, *, wavelength_nm: float,
                      opt: "OpticsOptions", design=None):
    """Responses for a biased mask: each cell at the size written into the mask (nominal + 2 x bias).

    A bias pre-compensates the process; the mask as written carries cells grown by ``2 * bias_nm``. Where the
    library has a cell of the same kind at exactly that size, its response is used; otherwise the biased cell is
    solved with metalay's RCWA (:class:`metalay.cells.biascells.BiasedCells`, with the library's recorded
    truncation unless ``opt.bias_harmonics`` says otherwise). Only with ``opt.bias_response = "nominal"`` is
    the nominal response kept (the process is assumed to remove the bias exactly), and the notes say so.

    Returns
    -------
    (t_long, t_short, record) : responses per library cell and a JSON-ready record of what was used.
    """
    from metalay.mask.process import biased_dims_nm, find_cell_at_dims

    response, harmonics, cache = _bias_settings(opt, design)
    t_long, t_short = t_long.copy(), t_short.copy()
    record = {"bias_nm": float(bias_nm), "response": response, "cells": {}}
    to_solve = []
    for k in np.unique(decoded.cell):  # cells in use (a short axis)
        cell = lib.cells[int(k)]
        j = find_cell_at_dims(lib, cell.kind, biased_dims_nm(cell, bias_nm))
        if j is not None:
            t_long[k], t_short[k] = t_long[j], t_short[j]
            record["cells"][cell.id] = f"library cell {lib.cells[j].id} (the size as written)"
            notes.append(f"bias {bias_nm:+g} nm: cell {cell.id} as written has the size of library cell "
                         f"{lib.cells[j].id}, whose response is used (the mask as written, before the process)")
        elif response == "nominal":
            record["cells"][cell.id] = "nominal response (chosen: the process removes the bias)"
            notes.append(f"bias {bias_nm:+g} nm: nominal response of cell {cell.id} used as asked (bias response "
                         "'nominal': assumes the process removes the bias exactly)")
        else:
            to_solve.append(int(k))
    if to_solve:
        from metalay.cells.biascells import BiasedCells

        try:
            solver = BiasedCells(lib, harmonics=harmonics, cache_dir=cache)
            tl_b, ts_b = solver.responses_at(to_solve, bias_nm, wavelength_nm)
        except LibraryError as exc:
            raise LibraryError(f"{exc} (to keep the nominal response instead, say so: metalay optics "
                               "--bias-response nominal, or checks.bias_response = \"nominal\" in the design "
                               "file)") from exc
        for k in to_solve:
            t_long[k], t_short[k] = tl_b[k], ts_b[k]
            record["cells"][lib.cells[k].id] = "solved at the size as written"
        record["solver"] = solver.record()
        trunc = solver.record()["truncation"]
        notes.append(f"bias {bias_nm:+g} nm: cell(s) {', '.join(lib.cells[k].id for k in to_solve)} solved at the "
                     f"size as written (nominal + {2 * bias_nm:+g} nm) with metalay's RCWA, truncation: "
                     f"{trunc if isinstance(trunc, str) else trunc['harmonics_x']}")
    return t_long, t_short, record


def facing_of(design, library, *, lit_from: str | None = None, where: str = ""):
    """The side the light arrives from for a check: ``lit_from``, else the design's, else the library's side.

    Returns
    -------
    metalay.design.side.Facing
    """
    from metalay.design.side import resolve_facing

    chosen = lit_from if lit_from is not None else getattr(design, "lit_from", None)
    where = getattr(design, "source_path", None) or where or library.name
    return resolve_facing(chosen, mode=library.mode, library_lit_from=library.side, library_name=library.name,
                          where=where)


def beam_frame_sites(decoded: DecodedSites, facing) -> DecodedSites:
    """The decoded elements as the light leaving the element sees them (:mod:`metalay.design.side`).

    Transmission lit from the structures: positions mirrored (``y -> -y``, row ``j -> -j``) and rotations
    negated; reflection: rotations negated (the arriving spin is seen from the other face); lit through the
    substrate: unchanged. Everything downstream (Jones algebra with the design spin, far field, OAM, lens) then
    works in that one frame.
    """
    if facing.rotation_sign == 1 and not facing.mirror_y:
        return decoded
    from dataclasses import replace

    rot = decoded.rotation_rad
    if facing.rotation_sign == -1:
        rot = np.mod(-rot, np.pi)
        rot[rot >= np.pi] = 0.0
    i, j, y, origin = decoded.i, decoded.j, decoded.y_um, decoded.origin_um
    if facing.mirror_y:
        j, y, origin = -j, -y, (origin[0], -origin[1])
    order = np.lexsort((i, j))  # rows j, then i (the decoder's order)
    return replace(decoded, i=i[order], j=j[order], x_um=decoded.x_um[order], y_um=y[order],
                   cell=decoded.cell[order], rotation_rad=rot[order], size_error_nm=decoded.size_error_nm[order],
                   origin_um=origin)


# ----------------------------------------------------------------------------------------------------------------
# Evaluation of decoded elements (shared by the optical check and the tolerance / comparison studies)
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Evaluation:
    """What :func:`evaluate_elements` computed for one set of elements.

    Attributes
    ----------
    fields : SiteFields
        Output per element.
    near : NearField
        Sampled near field (aperture as illuminated region when given).
    budget : dict
        :func:`power_budget` of the elements.
    diameter_um : float
        Diameter of the disk with the illuminated area.
    radius_u : float
        Spot (lobe) radius in direction cosines: ``(2.5 + l_max/2) lambda / D``.
    far : FarField or None
        Far field of the designed polarisation (None with ``far_field=False`` or ``keep_far=False``).
    centres : dict name -> (u, v)
        Spot centres measured (designed spot, zero order, channels).
    spots : dict name -> float
        Fraction of the designed-polarisation power in each spot disk.
    oam : OamSpectrum or None
        OAM spectrum of the converted field about the beam axis (designs with an axis charge).
    oam_field : ndarray or None
        The converted near field with the tilt, lens and axicon terms removed (what ``oam`` was computed from).
    oam_order : int
        Interpolation order of the polar resampling (3 up to 2048 samples per side, else 1).
    """

    fields: SiteFields
    near: NearField
    budget: dict
    diameter_um: float
    radius_u: float
    far: grid.FarField | None = None
    centres: dict = field(default_factory=dict)
    spots: dict = field(default_factory=dict)
    oam: oam.OamSpectrum | None = None
    oam_field: np.ndarray | None = None
    oam_order: int = 3


def spot_centres(target: OpticsTarget, radius_u: float) -> tuple[dict, bool]:
    """Far-field spots to measure: the designed spot (and the zero order when apart), or one per channel.

    Returns the centres and whether the designed spot overlaps the zero order (deflection below two lobe radii).
    """
    centres = {}
    overlaps = False
    if not target.channels and not target.focal_length_um:
        centres["designed"] = target.direction
        if np.hypot(*target.direction) > 2 * radius_u:
            centres["zero_order"] = (0.0, 0.0)
        else:
            overlaps = True
    for k, (lc, uc, vc) in enumerate(target.channels):
        centres[f"channel_{k}_l{lc:+d}"] = (uc, vc)
    return centres, overlaps


def _oam_about_axis(near: NearField, target: OpticsTarget, diameter_um: float, *, charges, workers: int,
                    remove_factor=None):
    """OAM spectrum of the converted near field about the beam axis, tilt/lens/axicon terms removed."""
    oam_field = near.converted
    if target.remove_terms and remove_factor is not None:
        oam_field = near.converted * remove_factor(near, target)
    elif target.remove_terms:
        ph = _target_phase(target.remove_terms, near.x_um[None, :], near.y_um[:, None], target)
        # one expression on purpose: numpy multiplies into the temporary, whose last bits differ from a product
        # into a new array, and bench/output_hashes.json pins the report bytes
        oam_field = near.converted * np.exp(-1j * ph).astype(np.complex64)
        del ph
    room = min(target.center_um[0] - near.x_um[0], near.x_um[-1] - target.center_um[0],
               target.center_um[1] - near.y_um[0], near.y_um[-1] - target.center_um[1])
    r_oam = min(diameter_um / 2 - 1.5 * max(near.dx_um, near.dy_um), room - max(near.dx_um, near.dy_um))
    order = 3 if max(oam_field.shape) <= 2048 else 1
    spec = oam.oam_spectrum(oam_field, near.x_um, near.y_um, center=target.center_um, radius_um=r_oam,
                            charges=charges, order=order, workers=workers)
    return spec, oam_field, order


def evaluate_elements(decoded: DecodedSites, t_long, t_short, rotation_rad, target: OpticsTarget, *,
                      jones_in: np.ndarray, expected_ij=None, decimation: int = 1, empty_t: complex = 1.0,
                      pad_factor: float = 2.0, charges=range(-10, 11), far_field: bool = True,
                      keep_far: bool = True, keep_field: bool = False, measure_spots: bool = True,
                      remove_factor=None, workers: int = 2) -> Evaluation:
    """Optical evaluation of decoded elements: site fields -> near field -> power budget -> far field -> spots -> OAM.

    The one evaluation path of :func:`check_optics` and of the studies (:mod:`metalay.studies.study`), so an
    unperturbed study sample reproduces the check's figures exactly.

    Parameters
    ----------
    decoded : DecodedSites
        Elements (lattice indices; ``rotation_rad`` and responses are given separately).
    t_long, t_short : ndarray (S,) complex
        Responses per element at the wavelength of ``target``.
    rotation_rad : ndarray (S,)
        Rotation per element.
    target : OpticsTarget
        What the mask is meant to do (wavelength, spin, axis, channels, terms).
    jones_in : ndarray (2,)
        Input polarisation (:func:`input_jones`).
    expected_ij : (ndarray, ndarray), optional
        Lattice indices of the illuminated sites (see :func:`rasterize`).
    decimation : int
        Near-field block size (:func:`near_field_decimation`).
    empty_t : complex
        Unconverted amplitude of an illuminated cell without an element.
    pad_factor : float
        Far-field zero padding.
    charges : iterable of int
        OAM charges.
    far_field : bool
        False: stop after the power budget (no FFT, no OAM).
    keep_far, keep_field : bool
        Keep the far field in the result; keep its complex field too (needed for channel spectra).
    measure_spots : bool
        Measure the designed spots (False when there is no design to say where they are).
    remove_factor : callable (NearField, OpticsTarget) -> ndarray, optional
        Gives ``exp(-i phi_removed)`` (tilt, lens, axicon terms; complex64) on the near-field grid, for callers
        that cache it between evaluations; computed here when not given.
    workers : int
        FFT threads.

    Returns
    -------
    Evaluation
    """
    sf = site_fields(t_long, t_short, rotation_rad, jones_in, sigma=target.sigma)
    near = rasterize(decoded, sf, empty_t=empty_t, jones_in=jones_in, expected_ij=expected_ij,
                     decimation=decimation)
    budget = power_budget(sf, near.cells_illuminated, n_empty=near.cells_empty, empty_t=empty_t, jones_in=jones_in)
    lam_um = target.wavelength_nm * 1e-3
    diameter = 2 * np.sqrt(near.cells_illuminated * near.cell_area_um2 / np.pi)
    lmax = max([abs(target.charge or 0)] + [abs(c[0]) for c in target.channels])
    radius_u = (2.5 + 0.5 * lmax) * lam_um / diameter
    if not far_field:
        return Evaluation(sf, near, budget, float(diameter), float(radius_u))
    ff = grid.far_field(near.designed, near.dx_um, near.dy_um, target.wavelength_nm, x0_um=float(near.x_um[0]),
                        y0_um=float(near.y_um[0]), pad_factor=pad_factor, keep_field=keep_field, workers=workers)
    centres = spot_centres(target, radius_u)[0] if measure_spots else {}
    spots = spot_fractions(ff, centres, radius_u)
    if not keep_far:
        ff = None
    spec = oam_field = None
    order = 3
    if target.charge is not None:
        spec, oam_field, order = _oam_about_axis(near, target, diameter, charges=charges, workers=workers,
                                                 remove_factor=remove_factor)
    return Evaluation(sf, near, budget, float(diameter), float(radius_u), ff, centres, spots, spec, oam_field,
                      order)


# ----------------------------------------------------------------------------------------------------------------
# The optical check of a written mask, in named stages
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class OpticsOptions:
    """How :func:`check_optics` decodes, samples and reports (defaults are the command line's).

    Attributes
    ----------
    wavelength_nm : float, optional
        Check wavelength (default the design's, else the library's).
    polarization : str
        Input polarisation, see :func:`input_jones`.
    layer : (int, int), optional
        Structure layer/datatype (default: the design's structure layer, else (1, 0)).
    bias_nm : float, optional
        Process bias per edge written into the mask (default: the design's ``mask.bias_nm``, else 0).
    size_tol_nm, unmatched
        Decoding options, see :func:`metalay.checks.decode.decode_sites`.
    empty_t : complex
        Unconverted amplitude of an illuminated cell with no element.
    pad_factor : float
        Far-field zero padding (2 samples the intensity at the aperture's Nyquist rate).
    max_side : int
        Largest near-field grid side; larger masks are decimated by block averaging (stated, with an error
        estimate, in the notes).
    charges : tuple of int
        OAM charges reported.
    make_plots : bool
        Render PNG figures and the HTML report.
    log_far_field : bool
        Log scale for the far-field image.
    keep_arrays : bool
        Keep the near and far field in the result.
    workers : int
        FFT threads.
    title : str, optional
        Report title.
    lit_from : {"substrate", "structures"}, optional
        Side the light arrives from (default: the design's ``design.lit_from``, else the library's side); see
        :mod:`metalay.design.side`.
    limits : metalay.design.limits.Limits, optional
        Verdict thresholds (default: the design's ``[checks.limits]``, else the defaults).
    max_memory_bytes : int, optional
        Memory budget of reading the mask (:func:`metalay.io.gdsread.read_mask`; default half of what the process
        may use).
    bias_response : {"as-written", "nominal"}, optional
        Responses of a biased mask: "as-written" uses each cell at the size written into the mask (a library
        cell of that size, else solved on demand by metalay's RCWA); "nominal" keeps the nominal response
        (assumes the process removes the bias exactly; stated in the notes). Default: the design's
        ``checks.bias_response``, else "as-written".
    bias_harmonics : (int, int), optional
        Truncation of those solves (default: the design's ``checks.bias_harmonics``, else the library's recorded
        truncation at each wavelength).
    cell_cache : str, optional
        Folder that keeps solved biased cells between runs (default: the design's ``checks.cell_cache``).
    """

    wavelength_nm: float | None = None
    polarization: str = "design"
    layer: tuple | None = None
    bias_nm: float | None = None
    size_tol_nm: float = 3.0
    unmatched: str = "error"
    empty_t: complex = 1.0
    pad_factor: float = 2.0
    max_side: int = 4096
    charges: tuple = tuple(range(-10, 11))
    make_plots: bool = True
    log_far_field: bool = True
    keep_arrays: bool = False
    workers: int = 2
    title: str | None = None
    lit_from: str | None = None
    limits: object = None
    max_memory_bytes: int | None = None
    bias_response: str | None = None
    bias_harmonics: tuple | None = None
    cell_cache: str | None = None


@dataclass(frozen=True, eq=False)
class _Decoded:
    """Stage 1 of the check: the mask read and decoded, with responses and the target."""

    mask_path: Path
    library: object
    design: object
    target: OpticsTarget
    no_target: bool
    layer: tuple
    bias_nm: float
    decoded: DecodedSites
    t_long: np.ndarray
    t_short: np.ndarray
    period_nm: float
    zoom: tuple            # (flat polygons near the centre or None, centre (um), half width (um), db unit (nm))
    facing: object = None  # metalay.design.side.Facing: the decoded sites are in the leaving light's frame
    bias: dict | None = None  # how the responses of a biased mask were obtained (_biased_responses)


def _read_and_decode(mask_path: Path, lib, design, target, opt: OpticsOptions, notes: list,
                     timings: dict) -> _Decoded:
    """Stage 1: read the structure layer, decode sites, pick the responses (biased sizes) and the target."""
    from metalay.io.gdsread import read_mask

    mask_settings = getattr(design, "mask", None)
    layer = opt.layer
    if layer is None:
        layer = mask_settings.layer("structures") if mask_settings is not None else (1, 0)
    bias_nm = opt.bias_nm
    if bias_nm is None:
        bias_nm = float(getattr(mask_settings, "bias_nm", 0.0) or 0.0)
    t0 = time.perf_counter()
    flat = read_mask(mask_path, layers=[written_layer(design, layer)],  # structures, or the film pieces
                     max_memory_bytes=opt.max_memory_bytes)
    timings["read_s"] = time.perf_counter() - t0
    no_target = target is None and design is None
    if target is None:
        if design is not None:
            target = target_from_design(design, wavelength_nm=opt.wavelength_nm)
        else:
            target = OpticsTarget(wavelength_nm=float(opt.wavelength_nm or lib.design_wavelength_nm), charge=None)
    wl = target.wavelength_nm
    if lib.has_responses:
        t_long, t_short = lib.response_at(wl)
        notes.append(f"cell responses from library {lib.name} at {wl:g} nm")
    else:
        t_long, t_short = ideal_responses(len(lib.cells))
        notes.append(f"library {lib.name} has no optical responses: ideal half-wave cells assumed (t_long = 1, "
                     "t_short = -1), so efficiencies are upper bounds set by the layout only")
    period_nm = design.lattice.period_nm if design is not None else lib.period_nm
    lattice = design.lattice.kind if design is not None else lib.lattice
    t0 = time.perf_counter()
    decoded = decode_written(flat, lib.cells, design, period_nm=period_nm, lattice=lattice, layer=tuple(layer),
                             size_tol_nm=opt.size_tol_nm, bias_nm=bias_nm, unmatched=opt.unmatched,
                             where=str(mask_path))
    timings["decode_s"] = time.perf_counter() - t0
    if tone_of(design) == "complement":
        notes.append(f"tone 'complement': {decoded.stats['pieces']} written film pieces read; the openings are the "
                     f"region minus the pieces on the writer's {decoded.stats['bands']} bands, measured by their area "
                     "moments")
    facing = facing_of(design, lib, lit_from=opt.lit_from, where=str(mask_path))
    decoded = beam_frame_sites(decoded, facing)
    notes.append(f"illumination: {facing.describe()}")
    bias_record = None
    if bias_nm and lib.has_responses:
        t0 = time.perf_counter()
        t_long, t_short, bias_record = _biased_responses(lib, t_long, t_short, decoded, bias_nm, notes,
                                                         wavelength_nm=wl, opt=opt, design=design)
        timings["bias_s"] = time.perf_counter() - t0
    # a small window of polygons for the layout figure, then free the vertex table
    zoom_c = tuple(float(v) for v in facing.beam_xy(*target.center_um))  # the axis as the file shows it
    zoom_hw = max(1.5, 4 * period_nm * 1e-3)
    first = flat.xy_db[flat.start[:-1]] * (flat.db_unit_nm / 1000.0)
    zoom_c = _zoom_on_structures(first, zoom_c, zoom_hw)
    win = (np.abs(first[:, 0] - zoom_c[0]) < zoom_hw + 1) & (np.abs(first[:, 1] - zoom_c[1]) < zoom_hw + 1)
    if tone_of(design) == "complement" and flat.count:  # film pieces are long: select them by their extent
        lo = np.minimum.reduceat(flat.xy_db, flat.start[:-1], axis=0) * (flat.db_unit_nm / 1000.0)
        hi = np.maximum.reduceat(flat.xy_db, flat.start[:-1], axis=0) * (flat.db_unit_nm / 1000.0)
        c = np.asarray(zoom_c)
        win = np.all((hi > c - zoom_hw - 1) & (lo < c + zoom_hw + 1), axis=1)
    zoom_flat = flat.select(win) if opt.make_plots else None
    return _Decoded(mask_path, lib, design, target, no_target, tuple(layer), bias_nm, decoded, t_long, t_short,
                    period_nm, (zoom_flat, zoom_c, zoom_hw, flat.db_unit_nm), facing, bias=bias_record)


def _zoom_on_structures(first_um: np.ndarray, centre, half_width_um: float) -> tuple[float, float]:
    """The zoom centre: ``centre`` when polygons lie within the window around it, else the polygon (first vertex)
    nearest to it (an annulus or an off-axis aperture has no structures on the axis)."""
    if first_um.shape[0] == 0:
        return centre
    d = np.maximum(np.abs(first_um[:, 0] - centre[0]), np.abs(first_um[:, 1] - centre[1]))
    if np.count_nonzero(d < half_width_um) >= 4:
        return centre
    k = int(np.argmin(np.hypot(first_um[:, 0] - centre[0], first_um[:, 1] - centre[1])))
    # move the window so the nearest polygon sits half a window inside it, towards the structures
    dx, dy = first_um[k, 0] - centre[0], first_um[k, 1] - centre[1]
    r = float(np.hypot(dx, dy))
    return (float(centre[0] + dx * (r + 0.5 * half_width_um) / r),
            float(centre[1] + dy * (r + 0.5 * half_width_um) / r))


def _decimation_note(ev: Evaluation, target: OpticsTarget, m: int, side: int, max_side: int) -> str:
    """What block-averaging the near field costs: valid far-field range and the designed-spot error estimate."""
    near = ev.near
    lam_um = target.wavelength_nm * 1e-3
    f_d = np.hypot(*target.direction) / lam_um
    if target.focal_length_um:
        f_d = max(f_d, np.sin(np.arctan(ev.diameter_um / (2 * target.focal_length_um))) / lam_um)
    for ch in target.channels:
        f_d = max(f_d, np.hypot(ch[1], ch[2]) / lam_um)
    p0 = near.dx_um / m
    dm = abs(np.sin(np.pi * m * p0 * f_d) / (m * np.sin(np.pi * p0 * f_d))) if f_d > 0 else 1.0
    est = 1 - (dm * np.sinc(m * p0 * f_d) / np.sinc(p0 * f_d)) ** 2 if f_d > 0 else 0.0
    return (f"near field decimated {m} x {m} (grid side {side} > {max_side}): far field valid for "
            f"|u| < {lam_um / (2 * near.dx_um):.3f}; estimated relative error of the designed-spot power "
            f"{est:.2e} (block average of a local phase gradient at {f_d:.3g} cycles/um)")


def _evaluate(dec: _Decoded, opt: OpticsOptions, notes: list, timings: dict) -> Evaluation:
    """Stage 2: the shared evaluation (:func:`evaluate_elements`) of the decoded elements."""
    target, decoded = dec.target, dec.decoded
    t0 = time.perf_counter()
    jin = input_jones(opt.polarization, design_sigma=target.sigma)
    expected = None
    if dec.design is not None:
        from metalay.design.lattice import sample_sites

        s = sample_sites(dec.design.aperture, dec.design.lattice)
        expected = (s.i, -s.j if dec.facing.mirror_y else s.j)
        notes.append(f"illuminated region: the {len(s):,} sites of the design aperture")
    else:
        notes.append("illuminated region: occupied sites with enclosed holes filled (no design given)")
    m, side = near_field_decimation(decoded, opt.max_side)
    ev = evaluate_elements(decoded, dec.t_long[decoded.cell], dec.t_short[decoded.cell], decoded.rotation_rad,
                           target, jones_in=jin, expected_ij=expected, decimation=m, empty_t=opt.empty_t,
                           pad_factor=opt.pad_factor, charges=opt.charges, keep_field=bool(target.channels),
                           measure_spots=not dec.no_target, workers=opt.workers)
    notes.append(ev.near.note)
    if m > 1:
        notes.append(_decimation_note(ev, target, m, side, opt.max_side))
    timings["evaluate_s"] = time.perf_counter() - t0
    return ev


def _phase_error_deg(dec: _Decoded, ev: Evaluation) -> dict | None:
    """RMS and worst error of the converted phase against the target at the sites (global offset removed)."""
    if not dec.target.terms:
        return None
    xs_site, ys_site = site_xy(dec.decoded)
    phi_t = _target_phase(dec.target.terms, xs_site, ys_site, dec.target)
    err = np.angle(ev.fields.converted.astype(np.complex128) * np.exp(-1j * phi_t))
    ok = np.abs(ev.fields.converted) > 0
    if not ok.any():
        return None
    g = np.angle(np.sum(np.exp(1j * err[ok])))
    e = np.angle(np.exp(1j * (err[ok] - g)))
    return {"rms": float(np.degrees(np.sqrt(np.mean(e * e)))), "max": float(np.degrees(np.max(np.abs(e))))}


def _spot_figures(dec: _Decoded, ev: Evaluation, figures: dict, notes: list) -> None:
    """Far-field spots: fractions, designed-spot efficiency and position (or the brightest direction)."""
    target, ff = dec.target, ev.far
    if dec.no_target:
        pu, pv, _ = _peak_near(ff, 0.0, 0.0, 1.0)
        figures["brightest_direction"] = {"u": pu, "v": pv,
                                          "angle_deg": float(np.degrees(np.arcsin(min(1.0, np.hypot(pu, pv)))))}
        notes.append("no design given: no designed spot, OAM or charge reading (pass the design for those)")
    elif spot_centres(target, ev.radius_u)[1]:
        notes.append("the designed spot overlaps the zero-order spot (deflection below two lobe radii): its "
                     "disk also holds any unconverted light")
    pol = ev.budget["designed_polarization"]
    figures["far_field"] = {"fractions_of_designed_polarization": ev.spots,
                            "fractions_of_incident": {k: v * pol for k, v in ev.spots.items()}}
    if "designed" in ev.spots:
        figures["designed_spot_efficiency"] = ev.spots["designed"] * pol
        pu, pv = _centroid_near(ff, *target.direction, ev.radius_u)
        figures["designed_spot_position"] = {"measured": [pu, pv], "design": list(target.direction),
                                             "method": "power centroid within the lobe radius",
                                             "deflection_deg": float(np.degrees(np.arcsin(min(1.0, np.hypot(pu, pv)))))}


def _oam_figures(dec: _Decoded, ev: Evaluation, opt: OpticsOptions, figures: dict, notes: list):
    """OAM spectrum about the axis and the charge read from a simulated interferogram; returns the fringes."""
    target, near, spec = dec.target, ev.near, ev.oam
    notes.append(f"OAM spectrum: field resampled on a polar grid ({spec.n_radial} radii x {spec.n_azimuthal} "
                 f"angles, {'cubic' if ev.oam_order == 3 else 'bilinear'} interpolation) within "
                 f"{spec.radius_um:.2f} um of the axis, after removing the tilt/lens/axicon terms of the design")
    figures["oam"] = {"about": "beam axis (non-vortex terms removed)", "charges": spec.charges.tolist(),
                      "interpolation_order": ev.oam_order,
                      "weights": spec.weights.tolist(), "design_charge": target.charge,
                      "purity": spec.purity(target.charge), "radius_um": spec.radius_um,
                      "mean_charge": spec.mean_charge()}
    # interferogram on a grid of at most 1024 samples per side (block averages keep the vortex phase)
    mf = int(np.ceil(max(ev.oam_field.shape) / 1024))
    fld = _block(ev.oam_field, mf)
    fx_ = near.x_um[0] + (np.arange(fld.shape[1]) * mf + (mf - 1) / 2) * near.dx_um
    fy_ = near.y_um[0] + (np.arange(fld.shape[0]) * mf + (mf - 1) / 2) * near.dy_um
    inten = fringes.interferogram(fld, fx_, fy_, wavelength_nm=target.wavelength_nm)
    reading = fringes.read_charge(inten, fx_, fy_, center=target.center_um, workers=opt.workers)
    readable = reading.readable
    figures["fringe_reading"] = {"status": reading.status, "charge": reading.charge if readable else None,
                                 "design_charge": target.charge,
                                 "agrees": bool(readable and reading.charge == target.charge),
                                 "windings": reading.windings.tolist(), "loop_radii_um": reading.radii_um.tolist(),
                                 "loop_agreement": reading.agreement,
                                 "loop_tolerance_turns": fringes.LOOP_TOLERANCE_TURNS}
    return inten, fx_, fy_


def _channel_figures(dec: _Decoded, ev: Evaluation, opt: OpticsOptions, figures: dict) -> None:
    """Per-channel OAM purity in the far-field spots and the crosstalk matrix of a multiplexed design."""
    target, ff, radius_u = dec.target, ev.far, ev.radius_u
    ch_oam = []
    for lc, uc, vc in target.channels:
        cols = np.flatnonzero(np.abs(ff.u - uc) <= radius_u + 3 * ff.du)
        rows = np.flatnonzero(np.abs(ff.v - vc) <= radius_u + 3 * ff.dv)
        sub = ff.field[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
        sp = oam.oam_spectrum(sub, ff.u[cols[0]:cols[-1] + 1], ff.v[rows[0]:rows[-1] + 1], center=(uc, vc),
                              radius_um=radius_u, charges=opt.charges, samples_per_pitch=2.0)
        ch_oam.append({"charge": lc, "purity": sp.purity(lc), "weights": sp.weights.tolist()})
    figures["oam_channels"] = {"about": "far-field spot of each channel", "charges": list(opt.charges),
                               "channels": ch_oam}
    xs, ys = site_xy(dec.decoded)
    figures["crosstalk"] = crosstalk_matrix(ev.near, target.channels, target.wavelength_nm, radius_u=radius_u,
                                            pad_factor=opt.pad_factor, workers=opt.workers,
                                            sites=(ev.fields.designed, xs, ys))


def _lens_figures(dec: _Decoded, ev: Evaluation, opt: OpticsOptions, figures: dict) -> None:
    """Focal spot, Strehl ratio and efficiency of a lens design (angular-spectrum propagation)."""
    target, near = dec.target, ev.near
    f_um = target.focal_length_um
    u0, v0 = target.direction
    w0 = np.sqrt(max(1e-12, 1 - u0 * u0 - v0 * v0))
    ideal = None
    if target.terms:
        ph = _target_phase(target.terms, near.x_um[None, :], near.y_um[:, None], target)
        ideal = np.abs(near.converted) * np.exp(1j * ph)
        del ph
    figures["lens"] = lens_metrics(near, target.wavelength_nm, f_um, ideal=ideal,
                                   medium_index=target.lens_medium_index,
                                   center_um=(f_um * u0 / w0, f_um * v0 / w0), workers=opt.workers)


def _figures(dec: _Decoded, ev: Evaluation, opt: OpticsOptions, notes: list, timings: dict):
    """Stage 3: every figure of merit (JSON-ready numbers); returns them and the interferogram for the plots."""
    t0 = time.perf_counter()
    near, ff = ev.near, ev.far
    figures = {"illumination": dec.facing.as_dict(),
               "wavelength_nm": dec.target.wavelength_nm, "input_polarization": opt.polarization,
               "design_spin": dec.target.sigma, "power_budget": ev.budget, "decode": dec.decoded.stats,
               **({"bias": dec.bias} if dec.bias is not None else {}),
               "grid": {"nx": int(near.designed.shape[1]), "ny": int(near.designed.shape[0]),
                        "dx_um": near.dx_um, "dy_um": near.dy_um, "decimation": near.decimation,
                        "fft_side": [int(ff.u.size), int(ff.v.size)], "pad_factor": opt.pad_factor},
               "aperture_equivalent_diameter_um": ev.diameter_um, "lobe_radius_u": ev.radius_u}
    phase_error = _phase_error_deg(dec, ev)
    if phase_error is not None:
        figures["phase_error_deg"] = phase_error
    _spot_figures(dec, ev, figures, notes)
    fringe_image = None
    if ev.oam is not None:
        fringe_image = _oam_figures(dec, ev, opt, figures, notes)
    if dec.target.channels:
        _channel_figures(dec, ev, opt, figures)
    if dec.target.focal_length_um:
        _lens_figures(dec, ev, opt, figures)
    timings["metrics_s"] = time.perf_counter() - t0
    return figures, fringe_image


def judged_figures(decoded: DecodedSites, ev: Evaluation, target: OpticsTarget, *, charges=range(-10, 11),
                   pad_factor: float = 2.0, workers: int = 2, limits=None) -> dict:
    """The judged figures of one evaluation, as the nominal check computes them, with their verdicts.

    The study's samples (:mod:`metalay.studies.study`) call this so that every sample carries the same metric set
    and verdicts as :func:`check_optics`: converted efficiency, OAM purity and the charge read from a simulated
    fork interferogram (designs with an axis charge; needs ``ev.oam_field``), per-channel purity and the
    crosstalk/isolation (multiplexed designs; needs ``ev.far``), focal spot and Strehl ratio (lenses).

    Returns
    -------
    dict
        ``figures`` (JSON-ready, the keys of :func:`check_optics`'s figures that are judged) and ``verdicts``
        (:func:`optics_verdicts`).
    """
    dec = SimpleNamespace(target=target, decoded=decoded)
    opt = SimpleNamespace(charges=tuple(charges), pad_factor=pad_factor, workers=workers)
    figures = {"power_budget": ev.budget}
    if ev.oam is not None and ev.oam_field is not None:
        _oam_figures(dec, ev, opt, figures, [])
    if target.channels and ev.far is not None:
        _channel_figures(dec, ev, opt, figures)
    if target.focal_length_um:
        _lens_figures(dec, ev, opt, figures)
    return {"figures": figures, "verdicts": optics_verdicts(figures, limits)}


def optics_verdicts(figures: dict, limits=None) -> dict:
    """Verdicts (pass / warn / fail) of the optical figures against thresholds with units.

    Parameters
    ----------
    figures : dict
        The figures of :func:`check_optics` (power budget, OAM, fringe reading, crosstalk, lens).
    limits : metalay.design.limits.Limits, optional
        Thresholds (default :data:`metalay.design.limits.DEFAULT_LIMITS`).

    Returns
    -------
    dict
        ``verdict`` (the worst item), ``items`` (one per figure judged: key, value, unit, thresholds, verdict,
        text) and ``summary`` (the items' texts).

    Notes
    -----
    Judged: converted efficiency (always), OAM purity of the designed charge (single-axis designs), the charge read
    from the simulated fork interferogram (pass when it equals the design's charge, fail when it differs, warn
    when the loops disagree: "unreadable"), worst channel isolation (multiplexed designs) and the Strehl ratio
    (lenses).
    """
    from metalay.design.limits import Limits, judge, unmeasured, worst_verdict

    limits = limits or Limits()
    items = [judge(figures["power_budget"]["converted"], limits.get("converted_efficiency"))]
    if "oam" in figures:
        items.append(judge(figures["oam"]["purity"], limits.get("oam_purity")))
    fr = figures.get("fringe_reading")
    if fr is not None:
        if fr["status"] != "read":
            why = fr.get("reason", "the loops around the core disagree")
            items.append(unmeasured("fringe_charge", f"unreadable: {why}"))
        else:
            ok = fr["charge"] == fr["design_charge"]
            items.append({"key": "fringe_charge", "what": "charge read from a simulated fork interferogram",
                          "unit": "count", "value": fr["charge"], "design": fr["design_charge"],
                          "verdict": "pass" if ok else "fail",
                          "text": f"fringe_charge {fr['charge']} {'==' if ok else '!='} design "
                                  f"{fr['design_charge']} ({'pass' if ok else 'fail'})"})
    ct = figures.get("crosstalk")
    if ct is not None and len(ct.get("charges", [])) > 1:
        items.append(judge(ct["worst_isolation_db"], limits.get("worst_isolation_db")))
    lens = figures.get("lens")
    if lens is not None:
        if lens.get("strehl") is None:
            items.append(unmeasured("strehl", "no aberration-free reference for this design"))
        else:
            items.append(judge(lens["strehl"], limits.get("strehl")))
    return {"verdict": worst_verdict(i["verdict"] for i in items), "items": items,
            "summary": "; ".join(i["text"] for i in items)}


def _images(dec: _Decoded, ev: Evaluation, figures: dict, fringe_image, opt: OpticsOptions) -> dict:
    """Stage 4: the PNG figures of the report, name -> (caption, PNG bytes)."""
    from metalay.checks import plots

    target, near, ff = dec.target, ev.near, ev.far
    zoom_flat, zoom_c, zoom_hw, db_unit_nm = dec.zoom
    images = {}
    sm = max(1, int(np.ceil(max(near.designed.shape) / 700)))
    xs, ys = near.x_um[::sm], near.y_um[::sm]
    valid = near.illuminated[::sm, ::sm]
    if target.terms:
        images["1_target_phase"] = ("target phase of the design (wrapped), sampled on the grid",
                                    plots.phase_map(_target_phase(target.terms, xs[None, :], ys[:, None], target),
                                                    xs, ys, title="target phase", valid=valid))
    conv = near.converted[::sm, ::sm]
    images["2_mask_phase"] = ("phase of the converted field decoded from the mask (frame of the leaving light)",
                              plots.phase_map(np.angle(conv), xs, ys, title="mask-derived phase",
                                              valid=valid & (np.abs(conv) > 0)))
    images["3_layout_zoom"] = (f"mask polygons within {zoom_hw:g} um of ({zoom_c[0]:.4g}, {zoom_c[1]:.4g}) um, as "
                               "the "
                               "file shows them (patterned face seen from above)",
                               plots.layout_zoom(zoom_flat.start, zoom_flat.xy_db, db_unit_nm, center_um=zoom_c,
                                                 half_width_um=zoom_hw,
                                                 by_extent=tone_of(dec.design) == "complement"))
    lam_um = target.wavelength_nm * 1e-3
    ext = min(1.0, max(3 * np.hypot(*target.direction), 40 * lam_um / ev.diameter_um,
                       *[1.5 * np.hypot(c[1], c[2]) for c in target.channels] or [0]))
    if target.focal_length_um:
        ext = 1.0
    images["4_far_field"] = ("far-field power of the designed polarisation over direction cosines",
                             plots.far_field_map(ff.power, ff.u, ff.v, log=opt.log_far_field, extent_u=ext,
                                                 marks=dict(ev.centres),
                                                 title="far field" + (" (log)" if opt.log_far_field else "")))
    if "oam" in figures:
        o = figures["oam"]
        images["5_oam_spectrum"] = ("OAM spectrum of the converted beam about its axis",
                                    plots.oam_bars(o["charges"], o["weights"], design_charge=target.charge))
        fr = figures["fringe_reading"]
        read = fr["charge"] if fr["status"] == "read" else "unreadable (the loops disagree)"
        images["7_interferogram"] = (f"converted beam with a tilted plane reference; charge read: {read}",
                                     plots.interferogram_map(*fringe_image))
    if "crosstalk" in figures:
        c = figures["crosstalk"]
        images["6_crosstalk"] = ("crosstalk: on-axis power at each channel spot, probing with each channel's "
                                 "conjugate vortex", plots.crosstalk_map(c["matrix_db"], c["charges"]))
    if "lens" in figures:
        lm = figures["lens"]
        images["8_focal_spot"] = ("focal spot profile against the Airy pattern of the same aperture",
                                  plots.focal_profile(lm["profile"]["radius_um"], lm["profile"]["intensity"],
                                                      airy_radius_um=lm["airy_radius_um"]))
    return images


def _site_phase_error(dec: _Decoded, ev: Evaluation):
    """Per-site error (rad, wrapped to (-pi, pi]) of the converted phase against the target and the global offset
    removed from it; (None, 0) without a target."""
    if not dec.target.terms:
        return None, 0.0
    xs_site, ys_site = site_xy(dec.decoded)
    phi_t = _target_phase(dec.target.terms, xs_site, ys_site, dec.target)
    err = np.angle(ev.fields.converted.astype(np.complex128) * np.exp(-1j * phi_t))
    ok = np.abs(ev.fields.converted) > 0
    if not ok.any():
        return None, 0.0
    g = float(np.angle(np.sum(np.exp(1j * err[ok]))))
    return np.angle(np.exp(1j * (err[ok] - g))), g


def _phase_error_section(dec: _Decoded, ev: Evaluation, figures: dict):
    """Report section: map and histogram of the mask-derived phase minus the target (wrapped, offset removed)."""
    from metalay.checks import plots
    from metalay.checks.report import Figure, Section, Table, fmt_number

    e, g = _site_phase_error(dec, ev)
    if e is None:
        return None
    near, target = ev.near, dec.target
    sm = max(1, int(np.ceil(max(near.designed.shape) / 700)))
    xs, ys = near.x_um[::sm], near.y_um[::sm]
    conv = near.converted[::sm, ::sm]
    phi_t = _target_phase(target.terms, xs[None, :], ys[:, None], target)
    err_deg = np.degrees(np.angle(conv * np.exp(-1j * (phi_t + g))))
    valid = near.illuminated[::sm, ::sm] & (np.abs(conv) > 0)
    e_deg = np.degrees(e)
    lim = float(max(5.0, min(180.0, np.ceil(np.percentile(np.abs(e_deg), 99.5) / 5) * 5)))
    pe = figures.get("phase_error_deg", {})
    rows = (("rms over sites", fmt_number(pe.get("rms")), "deg"), ("largest |error|", fmt_number(pe.get("max")), "deg"),
            ("global offset removed", fmt_number(float(np.degrees(g))), "deg"),
            ("sites", fmt_number(int(e.size)), "count"))
    return Section("phase-error", "Phase error: mask-derived minus target", (
        Table(("quantity", "value", "unit"), rows),
        Figure("phase of the converted field decoded from the written mask minus the target phase, wrapped to "
               "(-180, 180] deg, one global offset removed (frame of the leaving light; block-averaged where the "
               "near field is decimated)",
               plots.signed_map(err_deg, xs, ys, title="phase error (deg)", limit=lim, label="deg", valid=valid)),
        Figure("histogram of the per-site phase error (every decoded site)",
               plots.histogram(e_deg, bins=90, range_=(-lim, lim), xlabel="phase error (deg)",
                               title="phase error per site")),
    ), order=40)


def _rotation_section(dec: _Decoded):
    """Report section: histogram of the element rotation angles read back from the mask."""
    from metalay.checks import plots
    from metalay.checks.report import Figure, Section

    rot = np.mod(np.degrees(np.asarray(dec.decoded.rotation_rad, dtype=np.float64)), 180.0)
    if rot.size == 0:
        return None
    return Section("rotations", "Rotation angles", (Figure(
        "rotation of every element read back from the mask, modulo 180 deg (a geometric-phase design spreads "
        "them evenly; a few levels show as spikes)",
        plots.histogram(rot, bins=90, range_=(0.0, 180.0), xlabel="rotation angle (deg, file frame)",
                        title="element rotations")),), order=45)


def _spot_labels(target: OpticsTarget, centres: dict) -> dict:
    labels = {}
    for name, uv in centres.items():
        if name == "designed":
            lc = "" if target.charge is None else f", l = {target.charge:+d}"
            labels[f"designed order{lc}"] = uv
        elif name == "zero_order":
            labels["zero order"] = uv
        elif name.startswith("channel_"):
            _, k, lpart = name.split("_", 2)
            labels[f"ch {k}: l = {lpart[1:]}"] = uv
        else:
            labels[name.replace("_", " ")] = uv
    return labels


def _far_field_section(dec: _Decoded, ev: Evaluation):
    """Report section: the far field zoomed on the designed spot(s), orders and channels labelled."""
    from metalay.checks import plots
    from metalay.checks.report import Figure, Section

    target, ff, r = dec.target, ev.far, ev.radius_u
    if target.focal_length_um or dec.no_target:
        return None
    centres = dict(ev.centres)
    if target.channels:
        pts = np.asarray([(c[1], c[2]) for c in target.channels], dtype=np.float64)
        centre = tuple(float(c) for c in (pts.min(axis=0) + pts.max(axis=0)) / 2)
        half = float(max(np.max(np.abs(pts - centre)) + 4 * r, 6 * r))
        shown = {k: v for k, v in centres.items() if k.startswith("channel_")}
    else:
        centre = tuple(float(c) for c in target.direction)
        half = 3.5 * r
        shown = {k: v for k, v in centres.items() if k == "designed"}
    figs = [Figure(f"far-field power around the designed spot{'s' if len(shown) > 1 else ''} (linear scale; "
                   f"window +-{half:.4g} in direction cosines, dashed circles: one lobe radius {r:.3g})",
                   plots.far_field_zoom(ff.power, ff.u, ff.v, centre=centre, half_width=half,
                                        spots=_spot_labels(target, shown), lobe_radius=r))]
    if "zero_order" in centres or target.channels:
        pts = np.asarray([(0.0, 0.0)] + [tuple(c) for c in centres.values()], dtype=np.float64)
        mid = (pts.min(axis=0) + pts.max(axis=0)) / 2
        wide = float(min(1.0, max(np.max(np.abs(pts - mid)) + 6 * r, 10 * r)))
        figs.append(Figure("the same on a log scale over a wider window (the zero order included for a single "
                           "deflected spot)",
                           plots.far_field_zoom(ff.power, ff.u, ff.v, centre=tuple(float(c) for c in mid),
                                                half_width=wide,
                                                spots=_spot_labels(target, centres), lobe_radius=r, log=True,
                                                title="far field (log), orders labelled")))
    return Section("far-field", "Far field on the designed spots", tuple(figs), order=50)


def _layout_section(images: dict):
    from metalay.checks.report import Figure, Section

    if "3_layout_zoom" not in images:
        return None
    cap, png = images["3_layout_zoom"]
    return Section("layout-zoom", "Layout zoom", (Figure(cap, png),), order=35)


def report_sections(dec: _Decoded, ev: Evaluation, figures: dict, images: dict) -> tuple:
    """The optical check's own report sections (:class:`metalay.checks.report.Section`): layout zoom on
    structures, phase-error map and histogram, rotation histogram, far field on the designed spots."""
    out = [_layout_section(images), _phase_error_section(dec, ev, figures), _rotation_section(dec),
           _far_field_section(dec, ev)]
    return tuple(s for s in out if s is not None)


def check_optics(mask_path, library, *, design=None, target: OpticsTarget | None = None, out_dir=None,
                 options: OpticsOptions = OpticsOptions()) -> OpticsResult:
    """Check the optics of a written mask: decode it, build the near field, compute far field and metrics.

    Stages: :func:`_read_and_decode` -> :func:`evaluate_elements` (via ``_evaluate``) -> ``_figures`` ->
    ``_images`` -> report and files.

    Parameters
    ----------
    mask_path : str or Path
        GDSII or OASIS file.
    library : CellLibrary or str
        Cell library (object, bundled name or path); its responses at the wavelength are used, or ideal
        half-wave cells (``t_long = 1, t_short = -1``) when it carries geometry only (stated in the notes).
    design : Design, optional
        The design the mask was compiled from: gives the target (charge, tilt, lens, channels), lattice, aperture
        (illuminated sites) and spin.
    target : OpticsTarget, optional
        Overrides what is derived from ``design``.
    out_dir : str or Path, optional
        Write ``optics.json``, the PNG figures and ``optics_report.html`` here (atomic writes).
    options : OpticsOptions
        Wavelength, polarisation, layer, bias, decoding, sampling, plotting and thread settings.

    Returns
    -------
    OpticsResult
    """
    from metalay.cells.library import CellLibrary, load_library

    if getattr(design, "spin_decoupled", False):  # a phase per input spin: both spins, each against its target
        from metalay.checks.spinoptics import check_spin_optics

        return check_spin_optics(mask_path, library, design, out_dir=out_dir, options=options)
    opt = options
    t_all = time.perf_counter()
    keep_freed_memory()
    timings, notes = {}, []
    mask_path = Path(mask_path)
    lib = library if isinstance(library, CellLibrary) else load_library(library)
    dec = _read_and_decode(mask_path, lib, design, target, opt, notes, timings)
    ev = _evaluate(dec, opt, notes, timings)
    figures, fringe_image = _figures(dec, ev, opt, notes, timings)
    limits = opt.limits if opt.limits is not None else getattr(getattr(design, "checks", None), "limits", None)
    figures["verdicts"] = optics_verdicts(json_ready(figures), limits)
    images, html_text, sections = {}, None, ()
    if opt.make_plots:
        t0 = time.perf_counter()
        images = _images(dec, ev, figures, fringe_image, opt)
        sections = report_sections(dec, ev, json_ready(figures), images)
        timings["plots_s"] = time.perf_counter() - t0
    figures = json_ready(figures)
    inputs = {"mask": {"path": mask_path.name, "sha256": _sha256(mask_path), "bytes": mask_path.stat().st_size},
              "library": {"name": lib.name, "sha256": lib.sha256},
              "design": getattr(design, "name", None), "wavelength_nm": dec.target.wavelength_nm,
              "polarization": opt.polarization, "layer": list(dec.layer), "bias_nm": dec.bias_nm,
              "size_tol_nm": opt.size_tol_nm, "empty_t": str(opt.empty_t), "pad_factor": opt.pad_factor,
              "max_side": opt.max_side, "lit_from": dec.facing.lit_from,
              "illumination": dec.facing.describe(), "verdict": figures["verdicts"]["verdict"],
              **({"bias_response": dec.bias["response"]} if dec.bias is not None else {})}
    figures["inputs"] = json_ready(inputs)
    if opt.make_plots:
        from metalay.checks.report import render_html

        verdict = figures["verdicts"]
        html_text = render_html(title=(opt.title or f"Optical check of {mask_path.name}")
                                + f": verdict {verdict['verdict'].upper()}", caution=SAFETY_NOTE,
                                inputs=inputs, figures={k: v for k, v in figures.items() if k != "inputs"},
                                images={k: v for k, v in images.items() if k != "3_layout_zoom"},
                                notes=[f"verdict {verdict['verdict'].upper()}: {verdict['summary']}", *notes],
                                sections=(_optics_verdict_section(verdict), *sections))
    files = _write_outputs(Path(out_dir), figures, images, html_text) if out_dir is not None else {}
    timings["total_s"] = time.perf_counter() - t_all
    return OpticsResult(figures=figures, images=images, html=html_text, files=files, timings=timings,
                        notes=tuple(notes), near=ev.near if opt.keep_arrays else None,
                        far=ev.far if opt.keep_arrays else None, sections=sections)


def _optics_verdict_section(verdicts: dict):
    from metalay.checks.report import verdict_section

    return verdict_section({"overall": verdicts["verdict"], "by_check": {"optics": verdicts},
                            "reasons": [i["text"] for i in verdicts["items"] if i["verdict"] != "pass"]})


def _write_outputs(out_dir: Path, figures: dict, images: dict, html_text) -> dict:
    import json

    from metalay.util.atomic import atomic_write_bytes, ensure_dir

    ensure_dir(out_dir)
    written = {}

    def put(name, data: bytes):
        path = atomic_write_bytes(out_dir / name, data)
        written[name] = {"path": str(path), "sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}

    put("optics.json", (json.dumps(figures, sort_keys=True, indent=2, allow_nan=False) + "\n").encode())
    for name in sorted(images):
        put(f"{name.split('_', 1)[1]}.png", images[name][1])
    if html_text is not None:
        put("optics_report.html", html_text.encode("utf-8"))
    return written


def quick_check(mask_path, library, design, *, out_dir=None, workers: int = 2) -> dict:
    """A fast optical check of a freshly written mask, for ``compile``.

    Runs :func:`check_optics` with the near field capped at 1024 samples per side (block-averaged beyond, stated
    in the notes), OAM charges -10..10, and writes the figures and the report to ``out_dir`` when given.

    Returns
    -------
    dict
        ``figures`` (numbers), ``files`` (name -> path, sha256, bytes), ``notes``, ``timings``.
    """
    res = check_optics(mask_path, library, design=design, out_dir=out_dir,
                       options=OpticsOptions(max_side=1024, pad_factor=2.0, workers=workers))
    return {"figures": res.figures, "files": res.files, "notes": list(res.notes), "timings": res.timings,
            "sections": res.sections}


def compile_check(path, library, design) -> dict:
    """Hook for ``metalay compile``: quick check written to ``<mask folder>/optics``; a manifest-ready dict.

    Returns
    -------
    dict
        ``status`` and ``verdict`` (the worst verdict of :func:`optics_verdicts`), ``verdict_items``,
        ``verdict_summary``, ``summary`` (one line), ``figures``, ``files`` (relative to the mask folder),
        ``notes``.
    """
    out_dir = Path(path).parent / "optics"
    q = quick_check(path, library, design, out_dir=out_dir)
    f = q["figures"]
    parts = [f"converted {f['power_budget']['converted']:.3f}", f"leakage {f['power_budget']['leakage']:.3f}"]
    if "designed_spot_efficiency" in f:
        parts.append(f"designed spot {f['designed_spot_efficiency']:.3f}")
    if "oam" in f:
        parts.append(f"OAM purity l={f['oam']['design_charge']}: {f['oam']['purity']:.4f}")
    if "fringe_reading" in f:
        fr = f["fringe_reading"]
        parts.append(f"fringe charge {fr['charge'] if fr['status'] == 'read' else 'unreadable'}")
    if "crosstalk" in f and f["crosstalk"]["worst_isolation_db"] is not None:
        ct = f["crosstalk"]
        parts.append(f"worst isolation {ct['worst_isolation_db']:.1f} dB (direct sum at the channel directions), "
                     f"channel powers within {ct['power_spread_db']:.2f} dB")
    if "lens" in f and f["lens"]["strehl"] is not None:
        parts.append(f"Strehl {f['lens']['strehl']:.3f}")
    files = {k: {"path": os.path.relpath(v["path"], Path(path).parent), "sha256": v["sha256"], "bytes": v["bytes"]}
             for k, v in q["files"].items()}
    v = f["verdicts"]
    return {"status": v["verdict"], "verdict": v["verdict"], "verdict_items": v["items"],
            "verdict_summary": v["summary"], "summary": "; ".join(parts), "figures": f, "files": files,
            "notes": q["notes"], "timings_s": q["timings"], "report_sections": q["sections"]}
