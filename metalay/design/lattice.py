"""Lattice sampling inside an aperture: site centres of whole unit cells, vectorised, tile by tile.

A site is kept only when its whole unit cell (the p x p square of a square lattice, or the hexagonal Wigner-Seitz
cell of a hexagonal lattice) lies inside the aperture. Tiles are bands of lattice rows, so a tile is just a smaller
call with a ``row_range``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Aperture", "Lattice", "Sites", "sample_sites", "row_range", "site_count", "cell_area_um2",
           "aperture_area_um2", "estimated_sites", "cell_vertices_um"]

SQRT3 = np.sqrt(3.0)


@dataclass(frozen=True)
class Aperture:
    """Aperture centred on the origin.

    shape: "circle" (diameter_um), "square" (width_um), "rectangle" (width_um, height_um),
    "annulus" (diameter_um outer, inner_diameter_um).
    """

    shape: str
    diameter_um: float = 0.0
    width_um: float = 0.0
    height_um: float = 0.0
    inner_diameter_um: float = 0.0

    @property
    def half_extent_um(self) -> tuple[float, float]:
        """Half width and half height of the bounding box."""
        if self.shape in ("circle", "annulus"):
            return self.diameter_um / 2, self.diameter_um / 2
        if self.shape == "square":
            return self.width_um / 2, self.width_um / 2
        return self.width_um / 2, self.height_um / 2


@dataclass(frozen=True)
class Lattice:
    """Square or hexagonal lattice of period ``period_nm`` (nearest-neighbour distance), one site at the origin.

    Hexagonal rows run along x; row j sits at ``y = j p sqrt(3)/2`` and is shifted by ``p/2`` when j is odd.
    """

    kind: str
    period_nm: float

    @property
    def period_um(self) -> float:
        return self.period_nm * 1e-3

    @property
    def row_pitch_um(self) -> float:
        return self.period_um * (SQRT3 / 2 if self.kind == "hexagonal" else 1.0)


@dataclass(frozen=True)
class Sites:
    """Site centres and lattice indices (parallel arrays of length N)."""

    x_um: np.ndarray
    y_um: np.ndarray
    i: np.ndarray
    j: np.ndarray

    def __len__(self) -> int:
        return int(self.x_um.size)


def cell_vertices_um(lattice: Lattice) -> np.ndarray:
    """Vertices (V, 2) of the unit cell around its site, in micrometres."""
    p = lattice.period_um
    if lattice.kind == "square":
        return np.array([[p / 2, p / 2], [-p / 2, p / 2], [-p / 2, -p / 2], [p / 2, -p / 2]])
    r = p / SQRT3  # circumradius of the hexagonal Wigner-Seitz cell
    ang = np.deg2rad(90.0 + 60.0 * np.arange(6))
    return np.stack([r * np.cos(ang), r * np.sin(ang)], axis=1)


def cell_area_um2(lattice: Lattice) -> float:
    p = lattice.period_um
    return p * p * (SQRT3 / 2 if lattice.kind == "hexagonal" else 1.0)


def aperture_area_um2(aperture: Aperture) -> float:
    if aperture.shape == "circle":
        return np.pi * aperture.diameter_um ** 2 / 4
    if aperture.shape == "annulus":
        return np.pi * (aperture.diameter_um ** 2 - aperture.inner_diameter_um ** 2) / 4
    if aperture.shape == "square":
        return aperture.width_um ** 2
    return aperture.width_um * aperture.height_um


def estimated_sites(aperture: Aperture, lattice: Lattice) -> float:
    """Sites of ``lattice`` in ``aperture`` from the areas (no sampling; :func:`site_count` counts them exactly)."""
    return aperture_area_um2(aperture) / cell_area_um2(lattice)


def _inside_outer(aperture: Aperture, x, y):
    if aperture.shape in ("circle", "annulus"):
        r = aperture.diameter_um / 2
        return x * x + y * y <= r * r * (1 + 1e-12)
    hx, hy = aperture.half_extent_um
    return (np.abs(x) <= hx * (1 + 1e-12)) & (np.abs(y) <= hy * (1 + 1e-12))


def _clear_of_hole(aperture: Aperture, lattice: Lattice, x, y):
    if aperture.shape != "annulus" or aperture.inner_diameter_um <= 0:
        return np.ones(np.shape(x), dtype=bool)
    r_in = aperture.inner_diameter_um / 2
    p = lattice.period_um
    if lattice.kind == "square":
        # exact distance from the origin to the axis-aligned cell square
        dx = np.maximum(np.abs(x) - p / 2, 0.0)
        dy = np.maximum(np.abs(y) - p / 2, 0.0)
        return dx * dx + dy * dy >= r_in * r_in
    # hexagon: conservative (cell circumradius)
    return np.hypot(x, y) - p / SQRT3 >= r_in


def row_range(aperture: Aperture, lattice: Lattice) -> tuple[int, int]:
    """Half-open range of lattice row indices ``[j0, j1)`` that can hold sites."""
    hy = aperture.half_extent_um[1]
    jmax = int(np.floor(hy / lattice.row_pitch_um)) + 1
    return -jmax, jmax + 1


def _row_intervals(aperture: Aperture, lattice: Lattice, y_um: np.ndarray):
    """Per row, the exact interval [x_lo, x_hi] of centres whose whole cell lies inside a convex aperture.

    For a convex aperture and a convex cell, the cell is inside exactly when all its vertices are; for each vertex
    the allowed centres of a row form an interval, and the row's interval is their intersection.
    """
    lo = np.full(y_um.shape, -np.inf)
    hi = np.full(y_um.shape, np.inf)
    for vx, vy in cell_vertices_um(lattice):  # 4 or 6 vertices
        yy = y_um + vy
        if aperture.shape in ("circle", "annulus"):
            r = aperture.diameter_um / 2
            half = np.sqrt(np.maximum(r * r - yy * yy, 0.0)) * (1 + 1e-12)
            half = np.where(np.abs(yy) <= r * (1 + 1e-12), half, -np.inf)
        else:
            hx, hy = aperture.half_extent_um
            half = np.where(np.abs(yy) <= hy * (1 + 1e-12), hx * (1 + 1e-12), -np.inf)
        lo = np.maximum(lo, -half - vx)
        hi = np.minimum(hi, half - vx)
    return lo, hi


def sample_sites(aperture: Aperture, lattice: Lattice, *, rows: tuple[int, int] | None = None) -> Sites:
    """Site centres of whole cells inside ``aperture``, ordered by row then by x.

    Parameters
    ----------
    aperture : Aperture
    lattice : Lattice
    rows : (j0, j1), optional
        Restrict to lattice rows ``j0 <= j < j1`` (a tile). Default: all rows.

    Returns
    -------
    Sites
    """
    j0, j1 = row_range(aperture, lattice) if rows is None else rows
    j = np.arange(j0, j1, dtype=np.int64)
    p = lattice.period_um
    y = j * lattice.row_pitch_um
    shift = np.where(j % 2 != 0, 0.5, 0.0) if lattice.kind == "hexagonal" else np.zeros(j.size)
    x_lo, x_hi = _row_intervals(aperture, lattice, y)
    ok = x_hi >= x_lo
    imin = np.where(ok, np.ceil(np.where(ok, x_lo, 0) / p - shift - 1e-9), 0).astype(np.int64)
    imax = np.where(ok, np.floor(np.where(ok, x_hi, 0) / p - shift + 1e-9), -1).astype(np.int64)
    counts = np.maximum(imax - imin + 1, 0)
    total = int(counts.sum())
    if total == 0:
        empty = np.zeros(0)
        return Sites(empty, empty.copy(), np.zeros(0, np.int64), np.zeros(0, np.int64))
    row_of = np.repeat(np.arange(j.size), counts)
    ii = np.arange(total, dtype=np.int64) + np.repeat(imin - (np.cumsum(counts) - counts), counts)
    jj = j[row_of]
    xs = (ii + shift[row_of]) * p
    ys = y[row_of]
    if aperture.shape == "annulus":
        keep = _clear_of_hole(aperture, lattice, xs, ys)
        for vx, vy in cell_vertices_um(lattice):
            keep &= _inside_outer(aperture, xs + vx, ys + vy)
        return Sites(xs[keep], ys[keep], ii[keep], jj[keep])
    return Sites(xs, ys, ii, jj)


def site_count(aperture: Aperture, lattice: Lattice, *, rows_per_tile: int = 512) -> int:
    """Number of sites, counted tile by tile with bounded memory."""
    j0, j1 = row_range(aperture, lattice)
    return sum(len(sample_sites(aperture, lattice, rows=(a, min(a + rows_per_tile, j1))))
               for a in range(j0, j1, rows_per_tile))
