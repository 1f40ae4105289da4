"""Outlines of the cell kinds, centred on the origin with the long principal axis along +x (rotation 0).

Curved kinds are inscribed polygons with a vertex count chosen so that the largest deviation from the true
curve (the sagitta) does not exceed ``tolerance_nm``.
"""

from __future__ import annotations

import math

import numpy as np

from metalay.cells.library import CellSpec
from metalay.errors import LibraryError

__all__ = ["outline_nm", "polygon_vertex_count", "is_rotation_invariant"]


def polygon_vertex_count(radius_nm: float, tolerance_nm: float) -> int:
    """Vertices of an inscribed regular polygon whose sagitta ``r (1 - cos(pi / n))`` is at most the tolerance.

    Rounded up to a multiple of 4 so the outline keeps the symmetry of an ellipse.
    """
    if radius_nm <= tolerance_nm:
        return 8
    n = math.pi / math.acos(1.0 - tolerance_nm / radius_nm)
    return max(8, int(4 * math.ceil(n / 4)))


def outline_nm(cell: CellSpec, *, tolerance_nm: float = 0.5) -> np.ndarray:
    """Counter-clockwise outline ``(V, 2)`` of ``cell`` in nanometres.

    Parameters
    ----------
    cell : CellSpec
    tolerance_nm : float
        Largest allowed deviation of a polygonised curve from the true curve (nm).
    """
    if cell.kind in ("nanofin", "slot"):
        hl, hw = cell.dim("length_nm") / 2, cell.dim("width_nm") / 2
        return np.array([[hl, hw], [-hl, hw], [-hl, -hw], [hl, -hw]], dtype=np.float64)
    if cell.kind == "elliptic_pillar":
        a, b = cell.dim("major_nm") / 2, cell.dim("minor_nm") / 2
    elif cell.kind == "round_pillar":
        a = b = cell.dim("diameter_nm") / 2
    else:
        raise LibraryError(f"cell {cell.id!r}: unknown kind {cell.kind!r}")
    n = polygon_vertex_count(max(a, b), tolerance_nm)
    t = 2 * np.pi * np.arange(n) / n
    return np.stack([a * np.cos(t), b * np.sin(t)], axis=1)


def is_rotation_invariant(cell: CellSpec) -> bool:
    """True for kinds whose response does not depend on rotation (round pillars)."""
    return cell.kind == "round_pillar"
