"""Vortex demultiplexers: channel layouts whose mixing products miss the channels, padding-free isolation, and an
optimiser of the phase-only encoding (channel weights and phase offsets).

A demultiplexer element carries several channels ``k`` (charge ``l_k``, carrier direction ``(u_k, v_k)``, weight
``w_k``, offset ``p_k``) encoded phase-only as in the ``multiplex`` phase term (``design.phase.Multiplex``):

    phi = arg( sum_k w_k exp(i (l_k atan2(y, x) + 2 pi (u_k x + v_k y) / wavelength + p_k)) ).

Discarding the amplitude of the sum creates mixing (intermodulation) products: ``exp(i phi)`` is a sum of terms
``exp(i sum_j n_j A_j)`` with integer ``n_j`` summing to 1, each with charge ``sum n_j l_j`` and direction
``sum n_j (u_j, v_j)``.  Orders 3 (``A_i + A_j - A_m``) and 5 carry most of the lost power; measured here for equal
weights and five channels the amplitudes are about 0.40 (signal), 0.056 (``1, 1, -1``) and 0.051
(``1, 1, 1, -1, -1``).

Isolation (the definition of :func:`metalay.checks.optics.crosstalk_matrix`, kept compatible)
--------------------------------------------------------------------------------------
Channel ``k`` is probed by illuminating the element with the conjugate vortex ``exp(-i l_k phi)`` (the input that
channel ``k`` is built to receive); ``M[k, m]`` is the on-axis far-field intensity at channel ``m``'s direction.
Here it is evaluated exactly at the direction by a direct sum over the element's sites
(:mod:`metalay.checks.farpoints`), as the dimensionless spot strength (1 = an ideal plane wave from the whole element).
``isolation_db[k] = 10 log10(M[k, k] / max_{m != k} M[k, m])`` (power of input ``k`` at its own spot against the
strongest other spot it reaches: the row isolation of ``metalay.checks.optics``); ``column_isolation_db[m]`` compares
spot ``m``'s own input with the strongest other input landing there.  Channel power is ``M[k, k]``.

Layouts
-------
On a ring of carriers at the vertices of a regular ``p``-gon with ``p`` prime, no mixing product of any order can
land exactly on a channel: the only integer relation between the ``p``-th roots of unity is that they sum to zero
(the cyclotomic polynomial of a prime is irreducible), and a product equal to channel ``m`` would need the
coefficient vector ``n - e_m`` to be a multiple of ``(1, ..., 1)`` with ``sum n = 1``, i.e. ``n = e_m``.
A square layout (four carriers at 0, 90, 180, 270 degrees) has exact coincidences: with charges -2, -1, 1, 2 the
fifth-order product ``A_0 - A_1 + 2 A_2 - A_3`` lands on channel 1 with channel 2's charge.
:func:`design_ring_layout` picks the ``p``-gon and subset of vertices that keep orders 3 and 5 farthest from every
channel, then rotates the ring so that no two channels share an x or y coordinate (line defects along the lattice
axes, such as rows of elements missing at write-field edges, scatter along the axes).

References
----------
Mair, Vaziri, Weihs & Zeilinger 2001, Nature 412, 313 (conjugate-vortex detection of OAM states).
Gibson et al. 2004, Opt. Express 12, 5448 (free-space OAM channels: multiplexed holograms, crosstalk).
Schroeder 1970, IEEE Trans. Inf. Theory 16, 85 (phases of a multitone signal with a low crest factor; used as a
starting point for the offsets).
Goodman 2005, Introduction to Fourier Optics, 3rd ed., sec. 4.2 (Fraunhofer diffraction).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from metalay.design.phase import Channel
from metalay.errors import MetalayError

__all__ = [
    "channel_directions",
    "ring_channels",
    "mixing_coefficients",
    "LayoutClearance",
    "layout_clearance",
    "design_ring_layout",
    "aperture_sites",
    "DemuxPlan",
    "IsolationReport",
    "isolation_report",
    "evaluate_multiplex",
    "MultiplexOptimisation",
    "optimise_multiplex",
    "optimise_design_encodings",
]

#: Largest memory (bytes) the plan's precomputed channel and probe arrays may take.
PLAN_MAX_BYTES = 2_000_000_000


def channel_directions(channels) -> np.ndarray:
    """Direction cosines ``(u, v) = sin(angle) (cos az, sin az)`` (in air) of each channel, shape (C, 2)."""
    s = np.array([np.sin(np.radians(c.angle_deg)) for c in channels], dtype=np.float64)
    az = np.radians(np.array([c.azimuth_deg for c in channels], dtype=np.float64))
    return np.stack([s * np.cos(az), s * np.sin(az)], axis=1)


def ring_channels(charges, angle_deg: float, azimuths_deg, *, weights=None, offsets_deg=None) -> tuple:
    """Channels on a ring of deflection ``angle_deg`` at the given azimuths (one per charge).

    Returns
    -------
    tuple of :class:`metalay.design.phase.Channel`
    """
    charges = [int(q) for q in charges]
    az = [float(a) for a in azimuths_deg]
    if len(az) != len(charges):
        raise MetalayError(f"ring_channels: {len(charges)} charges but {len(az)} azimuths")
    w = [1.0] * len(charges) if weights is None else [float(a) for a in weights]
    off = [0.0] * len(charges) if offsets_deg is None else [float(a) for a in offsets_deg]
    return tuple(Channel(q, float(angle_deg), a, wk, ok) for q, a, wk, ok in zip(charges, az, w, off))


def mixing_coefficients(n_channels: int, orders=(3, 5)) -> np.ndarray:
    """Integer coefficient vectors ``n`` (sum 1, ``sum |n_j|`` in ``orders``) of the mixing products, (P, C)."""
    c = int(n_channels)
    if not 1 <= c <= 8:
        raise MetalayError(f"mixing_coefficients: n_channels = {c}; allowed 1..8")
    top = max(orders)
    span = range(-(top // 2 + 1), top // 2 + 2)
    grid_ = np.array(list(itertools.product(span, repeat=c)), dtype=np.int64).reshape(-1, c)
    order = np.abs(grid_).sum(axis=1)
    keep = (grid_.sum(axis=1) == 1) & np.isin(order, list(orders))
    return grid_[keep]


@dataclass(frozen=True)
class LayoutClearance:
    """How far the mixing products of a channel layout stay from the channel spots.

    Attributes
    ----------
    min_distance_spots : dict order -> float
        Smallest distance from a product of that order to any channel direction, in units of ``wavelength / D``
        (the Airy first zero is at 1.22).
    worst : dict order -> (coefficients, channel index)
        The product and channel reaching that minimum.
    min_coordinate_gap_spots : float
        Smallest difference in u or in v between two channels, or between a channel and the zero order's axes
        (``u = 0``, ``v = 0``), in ``wavelength / D``.
    """

    min_distance_spots: dict
    worst: dict
    min_coordinate_gap_spots: float


def _coordinate_gap(dirs: np.ndarray) -> float:
    vals = []
    for axis in (0, 1):
        c = np.concatenate([dirs[:, axis], [0.0]])
        d = np.abs(c[:, None] - c[None, :])
        vals.append(d[np.triu_indices(c.size, 1)].min())
    return float(min(vals))


def layout_clearance(channels, *, wavelength_nm: float, aperture_diameter_um: float,
                     orders=(3, 5)) -> LayoutClearance:
    """Clearance of the mixing products (orders 3 and 5 by default) from the channel spots.

    Parameters
    ----------
    channels : sequence of :class:`metalay.design.phase.Channel`
    wavelength_nm : float
    aperture_diameter_um : float
        Element diameter ``D``; the spot scale is ``wavelength / D`` in direction cosines.
    orders : tuple of int

    Returns
    -------
    LayoutClearance
    """
    dirs = channel_directions(channels)
    scale = aperture_diameter_um / (wavelength_nm * 1e-3)
    coef = mixing_coefficients(len(channels), orders)
    prod = coef @ dirs
    dist = np.hypot(prod[:, None, 0] - dirs[None, :, 0], prod[:, None, 1] - dirs[None, :, 1]) * scale
    order = np.abs(coef).sum(axis=1)
    mins, worst = {}, {}
    for o in orders:  # a few orders (short axis)
        sel = np.flatnonzero(order == o)
        if sel.size == 0:
            continue
        sub = dist[sel]
        i, m = np.unravel_index(np.argmin(sub), sub.shape)
        mins[int(o)] = float(sub[i, m])
        worst[int(o)] = (tuple(int(a) for a in coef[sel[i]]), int(m))
    return LayoutClearance(min_distance_spots=mins, worst=worst,
                           min_coordinate_gap_spots=_coordinate_gap(dirs) * scale)


def _primes(lo: int, hi: int):
    return [p for p in range(max(2, lo), hi + 1) if all(p % d for d in range(2, int(p ** 0.5) + 1))]


def _ring_candidates(c: int, s: float, max_polygon: int, per_polygon: int):
    """Best vertex subsets (containing vertex 0) of prime polygons by product clearance: [(score, p, subset)]."""
    coef = mixing_coefficients(c, (3, 5))
    out = []
    for p in _primes(c, max_polygon):  # a handful of polygons (short axis)
        subsets = np.array([(0,) + t for t in itertools.combinations(range(1, p), c - 1)])
        az = 2 * np.pi * subsets / p  # (n_sub, C)
        dirs = s * np.stack([np.cos(az), np.sin(az)], axis=-1)  # (n_sub, C, 2)
        prod = np.einsum("pc,scd->spd", coef, dirs)
        dist = np.linalg.norm(prod[:, :, None, :] - dirs[:, None, :, :], axis=-1).min(axis=(1, 2))
        for k in np.argsort(-dist, kind="stable")[:per_polygon]:
            out.append((float(dist[k]), p, subsets[k]))
    return out


def design_ring_layout(charges, angle_deg: float, *, wavelength_nm: float, aperture_diameter_um: float,
                       period_nm: float | None = None, lattice: str = "square", max_polygon: int | None = None,
                       per_polygon: int = 2, rotation_step_deg: float = 0.25) -> tuple:
    """Channels on a ring whose mixing products miss the channel spots.

    Parameters
    ----------
    charges : sequence of int
        Channel charges, in the order the channels are placed around the ring.
    angle_deg : float
        Deflection of every channel (ring radius ``sin(angle)`` in direction cosines).
    wavelength_nm, aperture_diameter_um : float
        Set the spot scale ``wavelength / D``.
    period_nm : float, optional
        Lattice period: when given, the candidate layouts are compared by their computed worst isolation
        (:func:`evaluate_multiplex`, equal weights) instead of by product clearance alone.
    lattice : {"square", "hexagonal"}
    max_polygon : int, optional
        Largest prime polygon tried (default ``3 C + 2``).
    per_polygon : int
        Candidate subsets kept per polygon (best product clearance first).
    rotation_step_deg : float
        Step of the ring-rotation search.

    Returns
    -------
    tuple of :class:`metalay.design.phase.Channel`
        Weights 1 and offsets 0 (see :func:`optimise_multiplex` for those).

    Notes
    -----
    Deterministic search.  Carriers sit on vertices of a regular ``p``-gon, ``p`` prime from ``C`` to
    ``max_polygon`` (no product of any order can then land exactly on a channel, see the module notes); for each
    ``p`` the ``per_polygon`` subsets of ``C`` vertices (containing vertex 0) with the largest distance from any
    order-3 or order-5 product to any channel are kept.  Each candidate ring is rotated to maximise
    :attr:`LayoutClearance.min_coordinate_gap_spots` (no two channels, and no channel and the zero order, on a
    common lattice row or column direction).  Without ``period_nm`` the largest clearance wins; with it, the
    largest computed ``min(worst row, worst column isolation)`` (clearance alone is only a proxy: measured here,
    a regular pentagon with clearance 6.6 spot widths isolates 5 dB better than an 11-gon subset with 8.3).
    """
    charges = [int(q) for q in charges]
    c = len(charges)
    if not 2 <= c <= 8:
        raise MetalayError(f"design_ring_layout: {c} channels; allowed 2..8")
    s = np.sin(np.radians(angle_deg))
    scale = aperture_diameter_um / (wavelength_nm * 1e-3)
    rots = np.arange(0.0, 360.0, rotation_step_deg)
    best = None
    sites = aperture_sites(aperture_diameter_um, period_nm, lattice=lattice) if period_nm else None
    for score, p, subset in sorted(_ring_candidates(c, s, max_polygon or 3 * c + 2, per_polygon),
                                   key=lambda t: (-t[0], t[1])):
        base = 360.0 * subset / p
        r_ok = rots[rots < 360.0 / p]
        gaps = [_coordinate_gap(channel_directions(ring_channels(charges, angle_deg, base + r))) for r in r_ok]
        chans = ring_channels(charges, angle_deg, np.round((base + float(r_ok[int(np.argmax(gaps))])) % 360.0, 4))
        if sites is not None:
            rep = evaluate_multiplex(chans, wavelength_nm=wavelength_nm, aperture_diameter_um=aperture_diameter_um,
                                     period_nm=period_nm, plan=DemuxPlan(chans, *sites, wavelength_nm=wavelength_nm))
            score = min(rep.worst_isolation_db, rep.worst_column_isolation_db)
        else:
            score = score * scale
        if best is None or score > best[0] + 1e-9:
            best = (score, chans)
    return best[1]


def aperture_sites(aperture_diameter_um: float, period_nm: float, *, lattice: str = "square"):
    """Lattice sites of a circular element as metalay's compiler places them: (x_um, y_um) arrays.

    Uses :func:`metalay.design.lattice.sample_sites` (whole cells inside the aperture, one site at the origin).
    """
    from metalay.design.lattice import Aperture, Lattice, sample_sites

    if lattice not in ("square", "hexagonal"):
        raise MetalayError(f"aperture_sites: lattice = {lattice!r}; allowed: 'square', 'hexagonal'")
    sites = sample_sites(Aperture("circle", diameter_um=float(aperture_diameter_um)),
                         Lattice(lattice, float(period_nm)))
    return np.asarray(sites.x_um, dtype=np.float64), np.asarray(sites.y_um, dtype=np.float64)


class DemuxPlan:
    """Precomputed channel fields and conjugate-vortex probes of one channel geometry over one set of sites.

    A plan object owns its cache (style: an FFT plan): building it costs ``C (C + 1)`` complex exponentials per
    site; afterwards an encoding is evaluated with two matrix products.

    Parameters
    ----------
    channels : sequence of :class:`metalay.design.phase.Channel`
        Charges and directions are used (weights and offsets are evaluation inputs).
    x_um, y_um : ndarray (S,)
        Site centres of the element.
    wavelength_nm : float
    center_um : (float, float)
        Vortex axis of the element (the ``multiplex`` term uses the origin).
    max_bytes : int
        Refuse plans larger than this (one clear error instead of running out of memory).

    Notes
    -----
    ``A[k, s] = exp(i (l_k theta_s + k0 (u_k x_s + v_k y_s)))`` (complex64), ``B[k C + m, s] =
    exp(-i l_k theta_s) exp(-i k0 (u_m x_s + v_m y_s))``; the element field is ``E = t / |t|`` with
    ``t = (w e^{i p}) @ A`` and the amplitudes at the spots are ``B @ E`` (the direct Fraunhofer sum of
    :mod:`metalay.checks.farpoints`, probe included).
    """

    def __init__(self, channels, x_um, y_um, *, wavelength_nm: float, center_um=(0.0, 0.0),
                 max_bytes: int = PLAN_MAX_BYTES):
        x_um = np.asarray(x_um, dtype=np.float64).ravel()
        y_um = np.asarray(y_um, dtype=np.float64).ravel()
        c = len(channels)
        if c < 1 or x_um.size == 0 or x_um.size != y_um.size:
            raise MetalayError(f"DemuxPlan: need >= 1 channel and matching non-empty site arrays, got {c} channels, "
                               f"{x_um.size} x and {y_um.size} y")
        need = 8 * x_um.size * c * (c + 1)
        if need > max_bytes:
            raise MetalayError(f"DemuxPlan: {x_um.size} sites x {c} channels need {need / 1e9:.2f} GB > "
                               f"{max_bytes / 1e9:.2f} GB allowed; evaluate a smaller element or raise max_bytes")
        self.channels = tuple(channels)
        self.charges = np.array([int(ch.charge) for ch in channels], dtype=np.int64)
        self.directions = channel_directions(channels)
        self.wavelength_nm = float(wavelength_nm)
        self.n_sites = int(x_um.size)
        k0 = 2 * np.pi / (self.wavelength_nm * 1e-3)
        theta = np.arctan2(y_um - center_um[1], x_um - center_um[0])
        carrier = k0 * (np.outer(self.directions[:, 0], x_um) + np.outer(self.directions[:, 1], y_um))  # (C, S)
        self.A = np.exp(1j * (np.outer(self.charges, theta) + carrier)).astype(np.complex64)
        self.B = np.empty((c * c, x_um.size), dtype=np.complex64)
        for k in range(c):  # channels (short axis), vectorised over sites
            self.B[k * c:(k + 1) * c] = np.exp(-1j * (self.charges[k] * theta[None, :] + carrier))
        del carrier

    def element_field(self, weights, offsets_rad) -> np.ndarray:
        """Unit-modulus element field ``exp(i phi)`` of the argument encoding, (S,) complex64 (0 where the sum
        vanishes)."""
        coef = (np.asarray(weights, dtype=np.float64) * np.exp(1j * np.asarray(offsets_rad, dtype=np.float64)))
        t = coef.astype(np.complex64) @ self.A
        mag = np.abs(t)
        return np.where(mag > 0, t / np.where(mag > 0, mag, 1), 0).astype(np.complex64)

    def matrix(self, field) -> np.ndarray:
        """Spot strengths ``M[k, m]`` (probe ``k``, spot ``m``) of an element field over the plan's sites, (C, C).

        ``|sum_s B[kC+m, s] E_s|^2 / (S sum |E_s|^2)``: 1 for an ideal plane wave from every site.
        """
        field = np.asarray(field).ravel()
        if field.size != self.n_sites:
            raise MetalayError(f"DemuxPlan.matrix: field has {field.size} values for {self.n_sites} sites")
        amp = self.B @ field.astype(np.complex64)
        power = float(np.vdot(field, field).real)
        if power <= 0:
            raise MetalayError("DemuxPlan.matrix: the element field carries no power")
        c = self.charges.size
        return (np.abs(amp.astype(np.complex128)) ** 2 / (self.n_sites * power)).reshape(c, c)


@dataclass(frozen=True, eq=False)
class IsolationReport:
    """Isolation of a demultiplexer evaluated exactly at the channel directions.

    Attributes
    ----------
    charges : tuple of int
    directions : ndarray (C, 2)
        Channel direction cosines ``(u, v)``.
    matrix : ndarray (C, C)
        Spot strength at spot ``m`` (column) when probing channel ``k`` (row) with its conjugate vortex.
    matrix_db : ndarray (C, C)
        ``10 log10(M[k, m] / M[k, k])``.
    isolation_db : ndarray (C,)
        Row isolation (the ``metalay.checks.optics`` definition): own spot over the strongest other spot.
    column_isolation_db : ndarray (C,)
        Spot ``m``'s own input over the strongest other input landing there.
    channel_power : ndarray (C,)
        ``M[k, k]`` (spot strength; ``1 / C`` would be an ideal equal split, less the encoding loss).
    worst_isolation_db, worst_column_isolation_db, power_spread_db : float
        Minima of the isolations and ``10 log10(max / min)`` of the channel powers.
    method : str
        How the spots were evaluated.
    """

    charges: tuple
    directions: np.ndarray
    matrix: np.ndarray
    matrix_db: np.ndarray
    isolation_db: np.ndarray
    column_isolation_db: np.ndarray
    channel_power: np.ndarray
    worst_isolation_db: float
    worst_column_isolation_db: float
    power_spread_db: float
    method: str

    def as_dict(self) -> dict:
        """JSON-ready numbers."""
        return {"charges": list(self.charges), "directions": self.directions.tolist(),
                "matrix": self.matrix.tolist(), "matrix_db": self.matrix_db.tolist(),
                "isolation_db": self.isolation_db.tolist(), "column_isolation_db": self.column_isolation_db.tolist(),
                "channel_power": self.channel_power.tolist(), "worst_isolation_db": self.worst_isolation_db,
                "worst_column_isolation_db": self.worst_column_isolation_db,
                "power_spread_db": self.power_spread_db, "method": self.method}


def isolation_report(matrix, charges, directions, *, method: str = "") -> IsolationReport:
    """Isolation figures from a probe-by-spot matrix (see :class:`IsolationReport`)."""
    m = np.asarray(matrix, dtype=np.float64)
    c = m.shape[0]
    diag = np.diag(m).copy()
    tiny = 1e-300
    off = np.where(np.eye(c, dtype=bool), -np.inf, m)
    if c > 1:
        row = 10 * np.log10(np.maximum(diag, tiny) / np.maximum(off.max(axis=1), tiny))
        col = 10 * np.log10(np.maximum(diag, tiny) / np.maximum(off.max(axis=0), tiny))
    else:
        row = col = np.full(1, np.inf)
    rel = 10 * np.log10(np.maximum(m, tiny) / np.maximum(diag[:, None], tiny))
    spread = float(10 * np.log10(max(diag.max(), tiny) / max(diag.min(), tiny)))
    return IsolationReport(charges=tuple(int(q) for q in charges), directions=np.asarray(directions, float),
                           matrix=m, matrix_db=rel, isolation_db=row, column_isolation_db=col, channel_power=diag,
                           worst_isolation_db=float(row.min()), worst_column_isolation_db=float(col.min()),
                           power_spread_db=spread, method=method)


_METHOD = ("direct Fraunhofer sum over the element's sites at each channel direction (no FFT, no padding), "
           "probe = conjugate vortex of the row's channel")


def evaluate_multiplex(channels, *, wavelength_nm: float, aperture_diameter_um: float, period_nm: float,
                       lattice: str = "square", field=None, plan: DemuxPlan | None = None) -> IsolationReport:
    """Isolation of a ``multiplex`` element (or of a given element field) at the channel directions.

    Parameters
    ----------
    channels : sequence of :class:`metalay.design.phase.Channel`
        Charges, directions, weights and offsets (as in a design file's ``multiplex`` term).
    wavelength_nm, aperture_diameter_um, period_nm : float
        Element on a circular aperture with sites as the compiler places them.
    lattice : {"square", "hexagonal"}
    field : ndarray (S,), optional
        Element field per site (e.g. the converted field decoded from a written mask, in the order of
        :func:`aperture_sites`); default the ideal phase-only encoding.
    plan : DemuxPlan, optional
        Reuse a plan built for these sites.

    Returns
    -------
    IsolationReport
    """
    if plan is None:
        x, y = aperture_sites(aperture_diameter_um, period_nm, lattice=lattice)
        plan = DemuxPlan(channels, x, y, wavelength_nm=wavelength_nm)
    if field is None:
        field = plan.element_field([c.weight for c in channels], np.radians([c.offset_deg for c in channels]))
    return isolation_report(plan.matrix(field), plan.charges, plan.directions, method=_METHOD)


@dataclass(frozen=True, eq=False)
class MultiplexOptimisation:
    """Result of :func:`optimise_multiplex`.

    Attributes
    ----------
    channels : tuple of :class:`metalay.design.phase.Channel`
        Optimised channels: weights (largest 1, 4 decimals) and ``offset_deg`` (0..360, 2 decimals), exactly the
        numbers a design file's ``multiplex`` term carries; ``after`` is evaluated with these rounded numbers.
    before, after : IsolationReport
    objective_before_db, objective_after_db : float
        ``min(worst row, worst column isolation) - 10 max(0, power spread - target)`` in dB.
    evaluations : int
        Encodings evaluated.
    method : str
    """

    channels: tuple
    before: IsolationReport
    after: IsolationReport
    objective_before_db: float
    objective_after_db: float
    evaluations: int
    method: str


def _objective(rep: IsolationReport, target_spread_db: float) -> float:
    return (min(rep.worst_isolation_db, rep.worst_column_isolation_db)
            - 10.0 * max(0.0, rep.power_spread_db - target_spread_db))


def optimise_multiplex(channels, *, wavelength_nm: float, aperture_diameter_um: float, period_nm: float,
                       lattice: str = "square", target_spread_db: float = 0.5, max_evaluations: int = 1200,
                       rounds: int = 4, plan: DemuxPlan | None = None) -> MultiplexOptimisation:
    """Optimise the channel weights and phase offsets of a ``multiplex`` encoding for isolation and equal power.

    Parameters
    ----------
    channels : sequence of :class:`metalay.design.phase.Channel`
        Starting channels (charges and directions are kept).
    wavelength_nm, aperture_diameter_um, period_nm : float
        The element (circular aperture, sites as the compiler places them).
    lattice : {"square", "hexagonal"}
    target_spread_db : float
        Channel-power spread (max / min, dB) tolerated without penalty.
    max_evaluations : int
        Budget of encodings evaluated (each costs two matrix products over the sites).
    rounds : int
        Nelder-Mead restarts, each around the best point so far with a simplex half the previous size.
    plan : DemuxPlan, optional

    Returns
    -------
    MultiplexOptimisation

    Notes
    -----
    Deterministic, in three steps: (1) weights equalise the channel powers by the fixed point
    ``w_k <- w_k (mean(P) / P_k)^(1/2)`` (6 steps); (2) the offsets start from the given ones or from Schroeder's
    low-crest-factor phases ``p_k = pi k^2 / C``, whichever scores higher; (3) Nelder-Mead (``scipy.optimize``) on
    ``(ln w_1..C-1, p_1..C-1)`` (channel 0 fixed: only relative weights and phases matter) maximises
    ``min(worst row isolation, worst column isolation) - 10 max(0, spread - target)``.  The result never scores
    below the start, which is among the candidates.

    References
    ----------
    Schroeder 1970, IEEE Trans. Inf. Theory 16, 85; Nelder & Mead 1965, Comput. J. 7, 308.
    """
    from scipy.optimize import minimize

    channels = tuple(channels)
    c = len(channels)
    if plan is None:
        x, y = aperture_sites(aperture_diameter_um, period_nm, lattice=lattice)
        plan = DemuxPlan(channels, x, y, wavelength_nm=wavelength_nm)
    count = [0]

    def report(w, p):
        count[0] += 1
        return isolation_report(plan.matrix(plan.element_field(w, p)), plan.charges, plan.directions,
                                method=_METHOD)

    w0 = np.array([ch.weight for ch in channels], dtype=np.float64)
    p0 = np.radians([ch.offset_deg for ch in channels])
    before = report(w0, p0)
    w = w0.copy()
    for _ in range(6):  # power-equalising fixed point (a few steps)
        pw = report(w, p0).channel_power
        w = w * np.sqrt(pw.mean() / np.maximum(pw, 1e-300))
    w = w / w.max()
    starts = [(w0 / w0.max(), p0), (w, p0), (w, np.pi * np.arange(c) ** 2 / c)]
    scored = [(_objective(report(a, b), target_spread_db), a, b) for a, b in starts]
    best_j, best_w, best_p = max(scored, key=lambda t: t[0])

    def unpack(z):
        return np.exp(np.concatenate([[0.0], z[:c - 1]])), np.concatenate([[0.0], z[c - 1:]])

    def cost(z):
        wz, pz = unpack(z)
        return -_objective(report(wz, pz), target_spread_db)

    z = np.concatenate([np.log(best_w[1:] / best_w[0]), best_p[1:] - best_p[0]])
    step_w, step_p = 0.15, 0.6
    for _ in range(max(1, rounds)):  # restarts (short axis)
        budget = max_evaluations - count[0]
        if c < 2 or budget < 4 * c:
            break
        simplex = np.vstack([z] + [z + np.eye(z.size)[i] * (step_w if i < c - 1 else step_p) for i in range(z.size)])
        res = minimize(cost, z, method="Nelder-Mead",
                       options={"maxfev": budget // max(1, rounds), "initial_simplex": simplex, "xatol": 1e-4,
                                "fatol": 1e-3})
        if -res.fun > best_j:
            best_j, z = -float(res.fun), res.x
        step_w, step_p = step_w / 2, step_p / 2
    wz, pz = unpack(z) if c > 1 else (best_w, best_p)
    if c > 1 and _objective(report(wz, pz), target_spread_db) < scored[0][0] - 1e-9:
        wz, pz = best_w, best_p  # never worse than the start (guards a degenerate search)
    wz = wz / wz.max()
    out = tuple(Channel(ch.charge, ch.angle_deg, ch.azimuth_deg, round(float(wk), 4),
                        round(float(np.degrees(pk) % 360.0), 2) % 360.0)
                for ch, wk, pk in zip(channels, wz, pz))
    after = report([ch.weight for ch in out], np.radians([ch.offset_deg for ch in out]))
    return MultiplexOptimisation(channels=out, before=before, after=after,
                                 objective_before_db=_objective(before, target_spread_db),
                                 objective_after_db=_objective(after, target_spread_db), evaluations=count[0],
                                 method="weight equalisation, Schroeder start, Nelder-Mead restarts; " + _METHOD)


def optimise_design_encodings(design) -> tuple:
    """Apply :func:`optimise_multiplex` to every ``multiplex`` term of a design that asks for it.

    Parameters
    ----------
    design : metalay.design.spec.Design
        A validated design; its ``multiplex`` terms with ``encoding = "optimise"`` are optimised over the design's
        own sites (aperture and lattice as the compiler places them), at the design wavelength.

    Returns
    -------
    design : Design
        The same design with those terms replaced by ``Multiplex(optimised channels, encoding="optimised")``
        (unchanged when no term asks).
    records : list of dict
        Per optimised term: ``term`` (index in ``[[phase]]``), ``channels`` (charge, angle_deg, azimuth_deg,
        weight, offset_deg: the numbers written), ``before`` / ``after`` (worst row and column isolation, channel
        power spread of the ideal phase-only element, dB), ``evaluations``, ``method`` and a ``summary`` line.

    Notes
    -----
    Deterministic: the same design gives the same numbers (the optimiser is; see :func:`optimise_multiplex`).
    """
    from dataclasses import replace

    from metalay.design.lattice import sample_sites
    from metalay.design.phase import Multiplex

    terms, records = list(design.terms), []
    sites = None
    for k, term in enumerate(terms):  # phase terms (short axis)
        if not (isinstance(term, Multiplex) and term.encoding == "optimise"):
            continue
        if sites is None:
            s = sample_sites(design.aperture, design.lattice)
            sites = (np.asarray(s.x_um, dtype=np.float64), np.asarray(s.y_um, dtype=np.float64))
        plan = DemuxPlan(term.channels, *sites, wavelength_nm=design.wavelength_nm)
        res = optimise_multiplex(term.channels, wavelength_nm=design.wavelength_nm,
                                 aperture_diameter_um=float(design.aperture.diameter_um or 0.0),
                                 period_nm=design.lattice.period_nm, lattice=design.lattice.kind,
                                 target_spread_db=term.spread_db, max_evaluations=term.max_evaluations, plan=plan)
        terms[k] = Multiplex(res.channels, "optimised", term.spread_db, term.max_evaluations)

        def figures(rep):
            return {"worst_isolation_db": round(rep.worst_isolation_db, 3),
                    "worst_column_isolation_db": round(rep.worst_column_isolation_db, 3),
                    "power_spread_db": round(rep.power_spread_db, 3)}

        before, after = figures(res.before), figures(res.after)
        records.append({
            "term": k, "evaluations": res.evaluations, "method": res.method, "before": before, "after": after,
            "channels": [{"charge": c.charge, "angle_deg": c.angle_deg, "azimuth_deg": c.azimuth_deg,
                          "weight": c.weight, "offset_deg": c.offset_deg} for c in res.channels],
            "summary": (f"multiplex term {k}: encoding optimised over the ideal element: worst isolation "
                        f"{before['worst_isolation_db']:.1f} -> {after['worst_isolation_db']:.1f} dB, channel powers "
                        f"within {before['power_spread_db']:.2f} -> {after['power_spread_db']:.2f} dB; weights "
                        f"{[c.weight for c in res.channels]}, offsets_deg {[c.offset_deg for c in res.channels]}")})
    if not records:
        return design, []
    return replace(design, terms=tuple(terms)), records
