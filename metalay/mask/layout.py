"""Mask geometry on the database grid: rotated, snapped element polygons, shape grouping, frame and label.

Snapping rule (lossless and deterministic): the site centre is rounded to a whole database unit, the rotated
outline is rounded *relative to the centre* with ``numpy.rint`` (half to even, the same rule the writer's
library uses), then the two are added. Because rint is odd-symmetric, a centrally symmetric outline stays
centrally symmetric after snapping, so every snapped nanofin is a parallelogram centred on its site.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Polygon", "SnappedRows", "snap_rows", "snap_centres", "element_offsets", "element_polygons",
           "recovered_rotation",
           "group_shapes", "ShapeGroups", "frame_polygons", "text_polygons", "rectangle"]


@dataclass(frozen=True)
class Polygon:
    """A single polygon of the mask (frame, label, mark): integer vertices in database units."""

    layer: int
    datatype: int
    xy_db: np.ndarray  # (V, 2) int64


def snap_centres(x_um, y_um, db_unit_nm: float) -> np.ndarray:
    """Site centres in whole database units, shape (N, 2) int64."""
    scale = 1000.0 / db_unit_nm
    return np.stack([np.rint(np.asarray(x_um) * scale), np.rint(np.asarray(y_um) * scale)], axis=1).astype(np.int64)


@dataclass(frozen=True)
class SnappedRows:
    """Snapped outline offsets, one contiguous row per coordinate (the fast layout for encoding records).

    Attributes
    ----------
    rows : ndarray (2k, N) int32
        ``rows[2v]`` and ``rows[2v + 1]`` are the x and y offsets of vertex ``v`` (database units), for the first
        ``k`` vertices; when ``symmetric``, vertex ``v + k`` is the negative of vertex ``v``.
    n_vertices : int
        Vertices of the outline (``V``).
    symmetric : bool
        Outline is centrally symmetric (vertex ``v + V/2 = -v``).
    error_rad : float
        Worst geometric-phase error from snapping, ``max |wrap(2 (recovered - intended))|`` (radians).
    """

    rows: np.ndarray
    n_vertices: int
    symmetric: bool
    error_rad: float

    def offsets(self) -> np.ndarray:
        """The same offsets as an (N, V, 2) int32 array."""
        k = self.rows.shape[0] // 2
        n = self.rows.shape[1]
        out = np.empty((n, self.n_vertices, 2), dtype=np.int32)
        out[:, :k, :] = self.rows.T.reshape(n, k, 2)
        if self.symmetric:  # rint is odd-symmetric, so the opposite vertices are exact negatives
            np.negative(out[:, :k], out=out[:, k:])
        return out


def snap_rows(outline_nm: np.ndarray, rotation_rad, db_unit_nm: float) -> SnappedRows:
    """Rotate the outline by each element's rotation and snap it to the grid relative to the centre.

    Parameters
    ----------
    outline_nm : ndarray (V, 2)
        Outline at rotation 0, nm.
    rotation_rad : ndarray (N,)
        Rotation of each element (counter-clockwise, radians).
    db_unit_nm : float
        Database unit in nm.

    Notes
    -----
    Each vertex is ``rint(R(theta) v / db)``; for a centrally symmetric outline only half the vertices are computed
    (rint is odd-symmetric). The snapping error of a 4-vertex outline comes from the cross product of the snapped
    long axis ``2 (v0 - v1)`` with the intended direction, so no arctangent per element is needed.
    """
    rotation_rad = np.asarray(rotation_rad, dtype=np.float64)
    nv = outline_nm.shape[0]
    symmetric = bool(nv % 2 == 0 and np.array_equal(outline_nm[nv // 2:], -outline_nm[:nv // 2]))
    k = nv // 2 if symmetric else nv
    c = np.cos(rotation_rad)
    s = np.sin(rotation_rad)
    n = c.shape[0]
    flat = np.empty((2 * k, n), dtype=np.float64)  # rows: x0, y0, x1, y1, ... (contiguous per vertex)
    for v in range(k):  # loop over the outline's vertices (a short axis), vectorised over sites
        ox, oy = outline_nm[v] / db_unit_nm
        np.multiply(c, ox, out=flat[2 * v])
        flat[2 * v] -= s * oy
        np.multiply(s, ox, out=flat[2 * v + 1])
        flat[2 * v + 1] += c * oy
    np.rint(flat, out=flat)
    rows = flat.astype(np.int32)
    if n == 0:
        err = 0.0
    elif symmetric and nv == 4:
        # long axis of the snapped parallelogram: (v0 + v3) - (v1 + v2) = 2 (v0 - v1)
        ax = flat[0] - flat[2]
        ay = flat[1] - flat[3]
        cross = ax * s - ay * c
        worst_sin2 = float(np.max(cross * cross / (ax * ax + ay * ay)))
        err = 2.0 * float(np.arcsin(min(1.0, np.sqrt(worst_sin2))))
    else:
        from metalay.mask.mapping import wrap_pi

        out = SnappedRows(rows, nv, symmetric, 0.0).offsets()
        err = float(np.max(np.abs(wrap_pi(2.0 * (recovered_rotation(out) - rotation_rad)))))
    return SnappedRows(rows, nv, symmetric, err)


def element_offsets(outline_nm: np.ndarray, rotation_rad, db_unit_nm: float, *, with_error: bool = False):
    """Rotated outline relative to the centre, snapped to the grid: (N, V, 2) int32 database units.

    See :func:`snap_rows` (same values in the (N, V, 2) layout). With ``with_error`` also the worst
    geometric-phase snapping error in radians.
    """
    snapped = snap_rows(outline_nm, rotation_rad, db_unit_nm)
    out = snapped.offsets()
    return (out, snapped.error_rad) if with_error else out


def element_polygons(centres_db: np.ndarray, offsets_db: np.ndarray) -> np.ndarray:
    """Absolute vertices (N, V, 2) int64 = centre + snapped offset."""
    return centres_db[:, None, :] + offsets_db


def recovered_rotation(offsets_db: np.ndarray) -> np.ndarray:
    """Element rotation (radians, [0, pi)) read back from snapped outlines.

    For 4-vertex outlines in the order of :func:`metalay.cells.cellkinds.outline_nm` the long axis is
    ``(v0 + v3) - (v1 + v2)``; for other outlines the principal axis of the vertex second moments.
    """
    if offsets_db.shape[1] == 4:
        ax = (offsets_db[:, 0] + offsets_db[:, 3] - offsets_db[:, 1] - offsets_db[:, 2]).astype(np.float64)
        return np.mod(np.arctan2(ax[:, 1], ax[:, 0]), np.pi)
    v = offsets_db.astype(np.float64)
    vx = v[:, :, 0] - v[:, :, 0].mean(axis=1, keepdims=True)
    vy = v[:, :, 1] - v[:, :, 1].mean(axis=1, keepdims=True)
    ang = 0.5 * np.arctan2(2 * (vx * vy).sum(axis=1), (vx * vx - vy * vy).sum(axis=1))
    return np.mod(ang, np.pi)


@dataclass(frozen=True)
class ShapeGroups:
    """Sites grouped by their exact snapped shape.

    Attributes
    ----------
    shapes_db : ndarray (S, V, 2) int32
        Distinct snapped offsets.
    shape_of_site : ndarray (N,) int64
        Index into ``shapes_db`` per site.
    """

    shapes_db: np.ndarray
    shape_of_site: np.ndarray


def group_shapes(offsets_db: np.ndarray) -> ShapeGroups:
    """Group elements by exact snapped shape (lossless).

    Centrally symmetric 4-vertex shapes with small coordinates are keyed by their first two vertices packed into
    one int64 (fast path); everything else by the raw bytes of all vertices.
    """
    n, nv, _ = offsets_db.shape
    if n == 0:
        return ShapeGroups(np.zeros((0, nv, 2), np.int32), np.zeros(0, np.int64))
    symmetric = nv == 4 and np.array_equal(offsets_db[:, 2], -offsets_db[:, 0]) and np.array_equal(
        offsets_db[:, 3], -offsets_db[:, 1])
    if symmetric and np.abs(offsets_db).max() < 32767:
        key = np.ascontiguousarray(offsets_db[:, :2, :].astype(np.int16).reshape(n, 4)).view(np.int64).ravel()
        uniq, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    else:
        flat = np.ascontiguousarray(offsets_db.reshape(n, -1))
        key = flat.view(np.dtype((np.void, flat.dtype.itemsize * flat.shape[1]))).ravel()
        uniq, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    return ShapeGroups(offsets_db[first].copy(), inverse.astype(np.int64).ravel())


def rectangle(x0_db: int, y0_db: int, x1_db: int, y1_db: int) -> np.ndarray:
    """Counter-clockwise rectangle vertices (4, 2) int64."""
    return np.array([[x0_db, y0_db], [x1_db, y0_db], [x1_db, y1_db], [x0_db, y1_db]], dtype=np.int64)


def frame_polygons(half_w_um: float, half_h_um: float, *, margin_um: float, width_um: float, db_unit_nm: float,
                   layer: int, datatype: int) -> list[Polygon]:
    """A rectangular frame of four bars around the aperture's bounding box plus ``margin_um``.

    Four bars rather than one ring, because GDSII boundaries cannot have holes.
    """
    s = 1000.0 / db_unit_nm
    ix0 = int(np.rint((half_w_um + margin_um) * s))
    iy0 = int(np.rint((half_h_um + margin_um) * s))
    w = max(int(np.rint(width_um * s)), 1)
    bars = [rectangle(-ix0 - w, iy0, ix0 + w, iy0 + w), rectangle(-ix0 - w, -iy0 - w, ix0 + w, -iy0),
            rectangle(-ix0 - w, -iy0, -ix0, iy0), rectangle(ix0, -iy0, ix0 + w, iy0)]
    return [Polygon(layer, datatype, b) for b in bars]


def text_polygons(text: str, *, height_um: float, x_um: float, y_um: float, db_unit_nm: float,
                  layer: int, datatype: int) -> list[Polygon]:
    """Text rendered as polygons (so it survives fabrication), lower-left corner at (x_um, y_um).

    Glyph outlines come from gdstk's built-in vector font.
    """
    import gdstk  # geometry only: glyph outlines

    s = 1000.0 / db_unit_nm
    out = []
    for poly in gdstk.text(text, height_um, (x_um, y_um)):
        pts = np.rint(np.asarray(poly.points) * s).astype(np.int64)
        keep = np.ones(len(pts), dtype=bool)
        keep[1:] = np.any(pts[1:] != pts[:-1], axis=1)  # drop repeated vertices after snapping
        pts = pts[keep]
        if len(pts) >= 3:
            out.append(Polygon(layer, datatype, pts))
    return out
