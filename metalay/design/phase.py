"""Target phase: a sum of phase terms, each a pure, vectorised function of the site coordinates.

Conventions (see README "Physics conventions"): time dependence exp(-i omega t); a plane wave travelling to +z is
exp(i k z); a phase element multiplies the field by exp(i phi). Coordinates are in micrometres with the origin at
the aperture centre. Every term returns ``phi`` in radians, unwrapped (the mapping stage wraps it).

Terms
-----
vortex      ``l * atan2(y - y0, x - x0)``: topological charge ``l``.
tilt        ``k0 * sin(angle) * (x cos(az) + y sin(az))``: a linear carrier deflecting the beam by ``angle`` in air.
lens        ``-k0 n (sqrt(r^2 + f^2) - f)``: hyperbolic focusing phase for a focal length ``f`` in a medium ``n``.
axicon      ``-k0 r sin(beta)``: conical phase making a Bessel-like beam with half-cone angle ``beta``.
qplate      orientation pattern ``theta = q * atan2(y, x) + alpha0``; as a phase it contributes ``2 sigma theta``
            so that the mapping ``theta = sigma phi / 2`` writes exactly that pattern (charge ``2 sigma q``).
multiplex   several vortex channels (charge, carrier direction, weight) superposed and encoded phase-only:
            ``phi = arg(sum_k w_k exp(i (l_k atan2(y, x) + k_k . r + p_k)))`` (argument encoding; the amplitude of the
            superposition is discarded, which is what a phase-only geometric-phase mask can write).
map         an imported phase map (.npy or .csv) on a regular grid with a stated physical extent, sampled bilinearly
            after bringing each grid cell's four values onto one branch (so a map given wrapped to (-pi, pi] and
            the same map unwrapped give the same phase modulo 2 pi).
mode_sorter one element of a log-polar OAM mode sorter (unwrapper, corrector, fan-out copier), with its lenses:
            :class:`metalay.design.logpolar.SorterElement` (parameters chosen by ``sorter_parameters``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import DesignError

__all__ = [
    "Vortex",
    "Tilt",
    "Lens",
    "Axicon",
    "QPlate",
    "Channel",
    "Multiplex",
    "PhaseMap",
    "PHASE_TERM_KINDS",
    "ENCODINGS",
    "target_phase",
    "term_phase",
    "phase_gradient",
    "load_phase_map",
]


@dataclass(frozen=True)
class Vortex:
    """Spiral phase ``charge * atan2(y - center_y_um, x - center_x_um)``."""

    charge: int
    center_x_um: float = 0.0
    center_y_um: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        return self.charge * np.arctan2(y_um - self.center_y_um, x_um - self.center_x_um)


@dataclass(frozen=True)
class Tilt:
    """Linear phase deflecting the converted beam by ``angle_deg`` (in air) towards azimuth ``azimuth_deg``.

    Notes
    -----
    Grating equation at normal incidence in air: ``sin(angle) = wavelength / carrier_period``, so the phase
    gradient is ``2 pi sin(angle) / wavelength``.

    References
    ----------
    Born & Wolf, Principles of Optics, grating equation.
    """

    angle_deg: float
    azimuth_deg: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        k0_per_um = 2 * np.pi / (wavelength_nm * 1e-3)
        s = np.sin(np.deg2rad(self.angle_deg))
        az = np.deg2rad(self.azimuth_deg)
        return k0_per_um * s * (x_um * np.cos(az) + y_um * np.sin(az))


@dataclass(frozen=True)
class Lens:
    """Hyperbolic focusing phase ``-(2 pi n / wavelength) (sqrt(r^2 + f^2) - f)``.

    References
    ----------
    Aieta et al. 2012, Nano Lett. 12, 4932 (hyperbolic phase profile of a flat lens).
    """

    focal_length_um: float
    medium_index: float = 1.0
    center_x_um: float = 0.0
    center_y_um: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        k_per_um = 2 * np.pi * self.medium_index / (wavelength_nm * 1e-3)
        r2 = (x_um - self.center_x_um) ** 2 + (y_um - self.center_y_um) ** 2
        f = self.focal_length_um
        return -k_per_um * (np.sqrt(r2 + f * f) - f)


@dataclass(frozen=True)
class Axicon:
    """Conical phase ``-(2 pi / wavelength) r sin(half_angle)`` (Bessel-like beam)."""

    half_angle_deg: float

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        k0_per_um = 2 * np.pi / (wavelength_nm * 1e-3)
        return -k0_per_um * np.hypot(x_um, y_um) * np.sin(np.deg2rad(self.half_angle_deg))


@dataclass(frozen=True)
class QPlate:
    """Orientation pattern ``theta = q * atan2(y, x) + alpha0``, contributing phase ``2 sigma theta``.

    References
    ----------
    Marrucci, Manzo, Paparo 2006, Phys. Rev. Lett. 96, 163905 (q-plate: output charge 2q per unit spin).
    """

    q: float
    alpha0_deg: float = 0.0

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        theta = self.q * np.arctan2(y_um, x_um) + np.deg2rad(self.alpha0_deg)
        return 2.0 * sigma * theta


@dataclass(frozen=True)
class Channel:
    """One channel of a multiplexed design: a vortex of ``charge`` on a carrier of ``angle_deg`` towards
    ``azimuth_deg``, with amplitude weight ``weight`` and a constant phase offset ``offset_deg``."""

    charge: int
    angle_deg: float
    azimuth_deg: float
    weight: float = 1.0
    offset_deg: float = 0.0


#: Values of a multiplex term's ``encoding``: the weights and offsets as given, optimise them at compile time
#: (:func:`metalay.api.prepare_design`), or numbers that the optimiser produced.
ENCODINGS = ("given", "optimise", "optimised")


@dataclass(frozen=True)
class Multiplex:
    """Phase-only (argument) encoding of a weighted superposition of vortex channels.

    ``encoding = "optimise"`` asks :func:`metalay.api.prepare_design` (run by ``metalay compile``) to replace the
    channel weights and offsets by those of :func:`metalay.measure.demux.optimise_multiplex` (worst isolation up,
    channel powers equal within ``spread_db``; deterministic, at most ``max_evaluations`` encodings) before the
    phase is written; the result carries ``encoding = "optimised"``. The phase itself always uses the channels as
    they are.
    """

    channels: tuple[Channel, ...]
    encoding: str = "given"
    spread_db: float = 0.5
    max_evaluations: int = 1200

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        k0_per_um = 2 * np.pi / (wavelength_nm * 1e-3)
        azimuth = np.arctan2(y_um, x_um)
        total = np.zeros(np.broadcast(x_um, y_um).shape, dtype=np.complex128)
        for ch in self.channels:  # loop over channels (a short axis), vectorised over sites
            s = np.sin(np.deg2rad(ch.angle_deg))
            az = np.deg2rad(ch.azimuth_deg)
            arg = (ch.charge * azimuth + k0_per_um * s * (x_um * np.cos(az) + y_um * np.sin(az))
                   + np.deg2rad(ch.offset_deg))
            total += ch.weight * np.exp(1j * arg)
        return np.angle(total)


@dataclass(frozen=True, eq=False)
class PhaseMap:
    """An imported phase map ``values_rad[row, col]`` on a regular grid covering the given extent.

    Row 0 is at ``y_min_um`` and column 0 at ``x_min_um`` (grid points at the edges of the extent).
    Sites outside the extent raise :class:`DesignError`.

    Notes
    -----
    Branch-aligned bilinear sampling: for the grid cell holding a site, the values at its other three corners are
    moved by whole turns onto the branch nearest the lower-left corner's value, ``v_k - 2 pi rint((v_k - v_00) /
    2 pi)``, and then interpolated bilinearly. A map given wrapped to ``(-pi, pi]`` and the same map unwrapped
    therefore give the same phase modulo ``2 pi`` wherever neighbouring grid values differ by less than ``pi``
    (Itoh's condition for unwrapping), and a smooth unwrapped map is sampled exactly as plain bilinear
    interpolation does (nothing is shifted). A real discontinuity keeps its values: a step or a vortex core
    affects only the grid cells that contain it (inside them the phase passes the short way round).

    References
    ----------
    Itoh 1982, Appl. Opt. 21, 2470 (phase unwrapping: differences of a sampled phase below pi).
    """

    values_rad: np.ndarray
    x_min_um: float
    x_max_um: float
    y_min_um: float
    y_max_um: float
    source: str = ""

    def phase(self, x_um, y_um, *, wavelength_nm: float, sigma: int):
        ny, nx = self.values_rad.shape
        fx = (np.asarray(x_um, dtype=np.float64) - self.x_min_um) / (self.x_max_um - self.x_min_um) * (nx - 1)
        fy = (np.asarray(y_um, dtype=np.float64) - self.y_min_um) / (self.y_max_um - self.y_min_um) * (ny - 1)
        eps = 1e-9
        outside = (fx < -eps) | (fx > nx - 1 + eps) | (fy < -eps) | (fy > ny - 1 + eps)
        if np.any(outside):
            k = int(np.flatnonzero(outside)[0])
            xs = np.broadcast_to(x_um, outside.shape).ravel()[k]
            ys = np.broadcast_to(y_um, outside.shape).ravel()[k]
            raise DesignError(
                f"{self.source}: site ({xs:.3f}, {ys:.3f}) um lies outside the phase map extent "
                f"x [{self.x_min_um:g}, {self.x_max_um:g}] um, y [{self.y_min_um:g}, {self.y_max_um:g}] um")
        fx = np.clip(fx, 0, nx - 1)
        fy = np.clip(fy, 0, ny - 1)
        i0 = np.minimum(np.floor(fx).astype(np.int64), max(nx - 2, 0))
        j0 = np.minimum(np.floor(fy).astype(np.int64), max(ny - 2, 0))
        tx = fx - i0
        ty = fy - j0
        v = self.values_rad
        i1 = np.minimum(i0 + 1, nx - 1)
        j1 = np.minimum(j0 + 1, ny - 1)
        v00 = v[j0, i0]
        two_pi = 2 * np.pi

        def branch(a):  # the corner value on the branch nearest v00 (unchanged for differences below pi)
            return a - two_pi * np.rint((a - v00) / two_pi)

        return ((1 - tx) * (1 - ty) * v00 + tx * (1 - ty) * branch(v[j0, i1])
                + (1 - tx) * ty * branch(v[j1, i0]) + tx * ty * branch(v[j1, i1]))


PHASE_TERM_KINDS = ("vortex", "tilt", "lens", "axicon", "qplate", "multiplex", "map", "mode_sorter")


def load_phase_map(path: str | Path, *, extent_um, where: str) -> PhaseMap:
    """Load a phase map from ``.npy`` (``allow_pickle=False``) or ``.csv`` (comma-separated rows).

    Parameters
    ----------
    path : str or Path
        File to read; rows run along +y, columns along +x.
    extent_um : sequence of 4 floats
        ``(x_min_um, x_max_um, y_min_um, y_max_um)`` of the grid points at the corners.
    where : str
        "file: key" text used in error messages.
    """
    path = Path(path)
    if not path.is_file():
        raise DesignError(f"{where}: phase map file {str(path)!r} not found")
    try:
        if path.suffix.lower() == ".npy":
            values = np.load(path, allow_pickle=False)
        elif path.suffix.lower() == ".csv":
            values = np.loadtxt(path, delimiter=",", dtype=np.float64, ndmin=2)
        else:
            raise DesignError(f"{where}: phase map {str(path)!r} must be .npy or .csv")
    except DesignError:
        raise
    except (ValueError, OSError) as exc:
        raise DesignError(f"{where}: cannot read phase map {str(path)!r} ({exc})") from exc
    values = np.asarray(values)
    if values.ndim != 2 or min(values.shape) < 2 or values.dtype.kind not in "fiu":
        raise DesignError(f"{where}: phase map must be a 2-D numeric array of at least 2 x 2, got shape "
                          f"{values.shape} dtype {values.dtype}")
    values = values.astype(np.float64)
    if not np.all(np.isfinite(values)):
        bad = np.argwhere(~np.isfinite(values))[0]
        raise DesignError(f"{where}: phase map {str(path)!r} has a non-finite value at row {bad[0]}, column "
                          f"{bad[1]} (allowed: finite radians)")
    x0, x1, y0, y1 = (float(v) for v in extent_um)
    if not (x1 > x0 and y1 > y0):
        raise DesignError(f"{where}: extent_um = {list(extent_um)} must be [x_min, x_max, y_min, y_max] with "
                          "max > min")
    return PhaseMap(values, x0, x1, y0, y1, source=where)


def term_phase(term, x_um, y_um, *, wavelength_nm: float, sigma: int) -> np.ndarray:
    """Phase of one term at the given coordinates (radians, unwrapped)."""
    return np.asarray(term.phase(x_um, y_um, wavelength_nm=wavelength_nm, sigma=sigma), dtype=np.float64)


def target_phase(terms, x_um, y_um, *, wavelength_nm: float, sigma: int = 1) -> np.ndarray:
    """Sum of the phase terms at sites ``(x_um, y_um)``.

    Parameters
    ----------
    terms : sequence of phase terms
        Any of :class:`Vortex`, :class:`Tilt`, :class:`Lens`, :class:`Axicon`, :class:`QPlate`,
        :class:`Multiplex`, :class:`PhaseMap`.
    x_um, y_um : ndarray
        Site coordinates in micrometres (broadcastable).
    wavelength_nm : float
        Design wavelength in nanometres (vacuum).
    sigma : {+1, -1}
        Input spin; only the q-plate term depends on it.

    Returns
    -------
    ndarray of float64
        ``phi`` in radians, not wrapped.
    """
    x_um = np.asarray(x_um, dtype=np.float64)
    y_um = np.asarray(y_um, dtype=np.float64)
    total = np.zeros(np.broadcast(x_um, y_um).shape, dtype=np.float64)
    for term in terms:  # loop over terms (a short axis)
        total += term_phase(term, x_um, y_um, wavelength_nm=wavelength_nm, sigma=sigma)
    return total


def phase_gradient(terms, x_um, y_um, *, wavelength_nm: float, sigma: int = 1, step_um: float = 1e-3):
    """Magnitude of the local phase gradient |grad phi| in rad/um by central differences of the wrapped phase.

    Differences are wrapped to (-pi, pi], so the vortex branch cut does not show as a gradient.
    """
    def d(dx, dy):
        a = target_phase(terms, x_um + dx, y_um + dy, wavelength_nm=wavelength_nm, sigma=sigma)
        b = target_phase(terms, x_um - dx, y_um - dy, wavelength_nm=wavelength_nm, sigma=sigma)
        return np.angle(np.exp(1j * (a - b))) / (2 * step_um)

    return np.hypot(d(step_um, 0.0), d(0.0, step_um))
