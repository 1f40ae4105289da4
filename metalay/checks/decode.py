"""Mask decoding: flattened polygons -> one element per lattice site (cell index, rotation), vectorised.

The optical check starts from the written mask, so every quantisation, snapping, bias, removal or clipping that the
mask carries is what the optics sees.  Decoding recovers, for each structure polygon:

* 4-vertex polygons (``nanofin`` / ``slot`` cells): centre = vertex mean; the two pairs of opposite edges give the
  length (longer pair, mean of the two) and width; rotation = direction of the long edges, ``atan2`` of the sum of
  the two (antiparallel) long edge vectors taken with opposite signs, modulo pi.
* N-vertex polygons, N >= 5 (``elliptic_pillar`` / ``round_pillar``): centre = vertex mean; principal axis from the
  second moments of the vertices, ``0.5 atan2(2 S_xy, S_xx - S_yy)``; major/minor = twice the largest projection
  of the vertices on the principal axes.

Each polygon is matched to the library cell nearest in its two sizes (Chebyshev distance in nm, after removing a
known process bias; on a near tie the same outline class wins, so a chamfered 8-vertex fin still matches its fin
cell), and placed on the lattice by rounding its centre.  Work is done in
chunks of polygons grouped by vertex count; the only Python loops run over chunks and over distinct vertex counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.errors import MaskReadError, MetalayError

__all__ = ["DecodedSites", "decode_sites", "sites_from_shapes", "polygon_shapes", "ShapeTable", "CellShapes",
           "cell_shape_table"]

_RECT_KINDS = ("nanofin", "slot")
_ROUND_KINDS = ("elliptic_pillar", "round_pillar")
_CHUNK = 1 << 18
SQRT3 = np.sqrt(3.0)


@dataclass(frozen=True, eq=False)
class ShapeTable:
    """Per-polygon measured shapes (parallel arrays of length P).

    Attributes
    ----------
    x_nm, y_nm : float64
        Centre.
    rotation_rad : float64
        Orientation of the long axis in [0, pi).
    a_nm, b_nm : float32
        Long and short size (length/width or major/minor).
    is_rect : bool
        True for 4-vertex polygons.
    """

    x_nm: np.ndarray
    y_nm: np.ndarray
    rotation_rad: np.ndarray
    a_nm: np.ndarray
    b_nm: np.ndarray
    is_rect: np.ndarray


def _edge_length(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Length (float32) of the integer edges ``b - a`` (each (2, K)): the float64 square root of the exact sum of
    squares, rounded once to float32 (the value ``np.hypot`` gives in float32 for these inputs)."""
    d = (b - a).astype(np.float64)
    return np.sqrt(d[0] * d[0] + d[1] * d[1]).astype(np.float32)


def _quads(v: np.ndarray, db_unit_nm: float):
    """Centre (nm), rotation, long and short size (nm) of quadrilaterals ``v`` (K, 4, 2) integer database units.

    Edge differences are taken in integers (exact) and the sizes in float32; ``e0 - e2`` and ``e1 - e3`` (twice
    the mean direction of each pair of opposite edges) are ``(v1 + v2) - (v0 + v3)`` and ``(v2 + v3) - (v0 + v1)``.
    The vertices are first copied to coordinate-major order (one pass) so every later pass reads contiguous memory.
    """
    t = np.ascontiguousarray(np.moveaxis(v, 0, -1))  # (4, 2, K)
    (x0, y0), (x1, y1), (x2, y2), (x3, y3) = t
    cx = (x0 + x1 + x2 + x3) * (0.25 * db_unit_nm)
    cy = (y0 + y1 + y2 + y3) * (0.25 * db_unit_nm)
    la = _edge_length(t[0], t[1]) + _edge_length(t[2], t[3])
    lb = _edge_length(t[1], t[2]) + _edge_length(t[3], t[0])
    long_a = la >= lb
    dx = np.where(long_a, (x1 + x2) - (x0 + x3), (x2 + x3) - (x0 + x1)).astype(np.float64)
    dy = np.where(long_a, (y1 + y2) - (y0 + y3), (y2 + y3) - (y0 + y1)).astype(np.float64)
    rot = np.arctan2(dy, dx)
    rot[rot < 0] += np.pi
    rot[rot >= np.pi] -= np.pi
    scale = np.float32(0.5 * db_unit_nm)
    return cx, cy, rot, np.maximum(la, lb) * scale, np.minimum(la, lb) * scale


def _ngons(v: np.ndarray):
    """Centre, rotation, major and minor size of N-gons ``v`` (K, N, 2) float64."""
    c = v.mean(axis=1)
    d = v - c[:, None, :]
    sxx = np.einsum("kn,kn->k", d[..., 0], d[..., 0])
    syy = np.einsum("kn,kn->k", d[..., 1], d[..., 1])
    sxy = np.einsum("kn,kn->k", d[..., 0], d[..., 1])
    rot = np.mod(0.5 * np.arctan2(2 * sxy, sxx - syy), np.pi)
    ca, sa = np.cos(rot), np.sin(rot)
    pa = d[..., 0] * ca[:, None] + d[..., 1] * sa[:, None]
    pb = -d[..., 0] * sa[:, None] + d[..., 1] * ca[:, None]
    a = 2 * np.abs(pa).max(axis=1)
    b = 2 * np.abs(pb).max(axis=1)
    return c, rot, a, b


def polygon_shapes(start: np.ndarray, xy_db: np.ndarray, db_unit_nm: float) -> ShapeTable:
    """Measure every polygon (centre, rotation, sizes) from a ``start``/``xy_db`` vertex table.

    Parameters
    ----------
    start : ndarray (P+1,) int64
        Polygon ``k`` has vertices ``xy_db[start[k]:start[k+1]]``.
    xy_db : ndarray (N, 2) int64
        Vertices in database units.
    db_unit_nm : float
        Database unit in nanometres.

    Returns
    -------
    ShapeTable

    Raises
    ------
    MetalayError
        For polygons with fewer than 4 vertices (no cell kind matches a triangle).
    """
    counts = np.diff(start)
    p = counts.size
    x = np.empty(p)
    y = np.empty(p)
    rot = np.empty(p)
    a = np.empty(p, dtype=np.float32)
    b = np.empty(p, dtype=np.float32)
    if p and counts.min() < 4:
        k = int(np.argmin(counts))
        raise MetalayError(f"polygon {k} has {int(counts[k])} vertices; structure polygons need at least 4 (a "
                           f"complement-tone mask holds film pieces: decode it with its design)")
    if p and counts.min() == counts.max() == 4:
        # every polygon a quadrilateral stored back to back: a free (P, 4, 2) view, processed in chunks
        v_all = xy_db.reshape(-1, 4, 2)
        for c0 in range(0, p, _CHUNK):
            sl = slice(c0, c0 + _CHUNK)
            x[sl], y[sl], rot[sl], a[sl], b[sl] = _quads(v_all[sl], db_unit_nm)
        return ShapeTable(x, y, rot, a, b, np.ones(p, bool))
    for n in np.unique(counts):  # loop over distinct vertex counts (short axis)
        idx = np.flatnonzero(counts == n)
        for c0 in range(0, idx.size, _CHUNK):  # bounded memory
            sel = idx[c0:c0 + _CHUNK]
            v = xy_db[start[sel][:, None] + np.arange(n)[None, :]]
            if n == 4:
                x[sel], y[sel], rot[sel], a[sel], b[sel] = _quads(v, db_unit_nm)
            else:
                c, r, aa, bb = _ngons(v.astype(np.float64) * db_unit_nm)
                x[sel], y[sel], rot[sel], a[sel], b[sel] = c[:, 0], c[:, 1], r, aa, bb
    return ShapeTable(x, y, rot, a, b, counts == 4)


@dataclass(frozen=True)
class CellShapes:
    """Library cells as (kind class, long size, short size) arrays."""

    is_rect: np.ndarray
    a_nm: np.ndarray
    b_nm: np.ndarray
    rotates: np.ndarray


def cell_shape_table(cells) -> CellShapes:
    """Long/short sizes of library cells (``CellSpec`` objects with ``kind`` and ``dim(name)``)."""
    is_rect, a, b, rotates = [], [], [], []
    for cell in cells:  # loop over library cells (short axis)
        if cell.kind in _RECT_KINDS:
            la, lb = cell.dim("length_nm"), cell.dim("width_nm")
            is_rect.append(True)
        elif cell.kind == "elliptic_pillar":
            la, lb = cell.dim("major_nm"), cell.dim("minor_nm")
            is_rect.append(False)
        elif cell.kind == "round_pillar":
            la = lb = cell.dim("diameter_nm")
            is_rect.append(False)
        else:
            raise MetalayError(f"cell {cell.id!r}: unknown kind {cell.kind!r}; allowed: "
                               f"{', '.join(_RECT_KINDS + _ROUND_KINDS)}")
        a.append(max(la, lb))
        b.append(min(la, lb))
        rotates.append(cell.kind != "round_pillar")
    return CellShapes(np.array(is_rect, bool), np.array(a, float), np.array(b, float), np.array(rotates, bool))


@dataclass(frozen=True, eq=False)
class DecodedSites:
    """One decoded element per occupied lattice site (parallel arrays of length S, sorted by row j then i).

    Attributes
    ----------
    i, j : ndarray int64
        Lattice indices (square: ``x = i p, y = j p``; hexagonal: ``x = (i + (j odd)/2) p, y = j p sqrt(3)/2``,
        relative to ``origin_um``).
    x_um, y_um : ndarray float64
        Measured element centres.
    cell : ndarray int32
        Index of the matched library cell.
    rotation_rad : ndarray float64
        Long-axis orientation in [0, pi) (0 for round pillars).
    size_error_nm : ndarray float32
        Chebyshev distance between the measured (bias-corrected) sizes and the matched cell's sizes.
    lattice : str
        "square" or "hexagonal".
    period_nm : float
        Lattice period.
    origin_um : (float, float)
        Lattice origin.
    stats : dict
        ``polygons`` (structure polygons read), ``sites``, ``unmatched`` (size error above tolerance),
        ``off_lattice`` (centre farther than a quarter period from its site), ``duplicates`` (extra elements on an
        occupied site, dropped), ``max_size_error_nm``, ``max_center_offset_nm``, ``size_tolerance_nm``,
        ``bias_nm``.
    """

    i: np.ndarray
    j: np.ndarray
    x_um: np.ndarray
    y_um: np.ndarray
    cell: np.ndarray
    rotation_rad: np.ndarray
    size_error_nm: np.ndarray
    lattice: str
    period_nm: float
    origin_um: tuple
    stats: dict

    def __len__(self) -> int:
        return int(self.i.size)


def _match(shapes: ShapeTable, cs: CellShapes, bias_nm: float):
    """Nearest compatible cell per polygon and its Chebyshev size distance (chunked, vectorised)."""
    p = shapes.a_nm.size
    if cs.a_nm.size == 1:  # one cell: no search
        da = np.abs(shapes.a_nm - np.float32(2 * bias_nm + cs.a_nm[0]))
        db = np.abs(shapes.b_nm - np.float32(2 * bias_nm + cs.b_nm[0]))
        return np.zeros(p, dtype=np.int32), np.maximum(da, db, out=da)
    best = np.full(p, -1, dtype=np.int32)
    err = np.full(p, np.inf, dtype=np.float32)
    for c0 in range(0, p, _CHUNK):
        sl = slice(c0, c0 + _CHUNK)
        a = shapes.a_nm[sl, None] - 2 * bias_nm
        b = shapes.b_nm[sl, None] - 2 * bias_nm
        d = np.maximum(np.abs(a - cs.a_nm[None, :]), np.abs(b - cs.b_nm[None, :]))
        # sizes decide; on a near tie prefer the same outline class (4 vertices <-> fin/slot)
        d = d + np.where(shapes.is_rect[sl, None] == cs.is_rect[None, :], 0.0, 1e-3)
        k = np.argmin(d, axis=1)
        best[sl] = k
        err[sl] = d[np.arange(k.size), k]
    return best, err


def _lattice_indices(shapes, period_nm: float, lattice: str, origin_um):
    """Nearest lattice site ``(i, j)`` of each polygon centre and the centre's distance from it (nm)."""
    p = period_nm
    x0, y0 = origin_um[0] * 1000.0, origin_um[1] * 1000.0
    if lattice == "square":
        jj = np.rint((shapes.y_nm - y0) / p).astype(np.int64)
        ii = np.rint((shapes.x_nm - x0) / p).astype(np.int64)
        sx, sy = ii * p + x0, jj * p + y0
    else:
        rp = p * SQRT3 / 2
        jj = np.rint((shapes.y_nm - y0) / rp).astype(np.int64)
        half = (jj % 2) * 0.5
        ii = np.rint((shapes.x_nm - x0) / p - half).astype(np.int64)
        sx, sy = (ii + half) * p + x0, jj * rp + y0
    sx -= shapes.x_nm
    sy -= shapes.y_nm
    return ii, jj, np.hypot(sx, sy, out=sx)


def _one_per_site(ii, jj, keep):
    """Kept polygons in (j, i) site order, one per site (the first; the others count as duplicates).

    Returns their indices, whether that is every polygon in file order (no gather needed), and the duplicates.
    """
    n_poly = ii.size
    every = bool(keep.all())
    idx = np.arange(n_poly) if every else np.flatnonzero(keep)
    # site key in (j, i) order; masks written row by row are already sorted, so the sort is usually skipped
    imin = int(ii.min()) if n_poly else 0
    width = int(ii.max()) - imin + 1 if n_poly else 1
    key = (jj - int(jj.min() if n_poly else 0)) * width + (ii - imin)
    if not every:
        key = key[idx]
    if key.size > 1 and not np.all(key[1:] > key[:-1]):
        order = np.argsort(key, kind="stable")
        idx, key = idx[order], key[order]
        every = False
    first = np.ones(idx.size, bool)
    if idx.size > 1:
        first[1:] = key[1:] != key[:-1]
    n_dup = int(idx.size - first.sum())
    if n_dup:
        idx = idx[first]
    return idx, every, n_dup


def decode_sites(flat, cells, *, period_nm: float, lattice: str = "square", layer=(1, 0), origin_um=(0.0, 0.0),
                 size_tol_nm: float = 3.0, bias_nm: float = 0.0, unmatched: str = "error",
                 where: str = "mask") -> DecodedSites:
    """Identify the element at every lattice site of a flattened mask.

    Parameters
    ----------
    flat : FlatPolygons
        Polygons from :func:`metalay.io.gdsread.read_mask` (or built with ``FlatPolygons.from_arrays``).
    cells : sequence of CellSpec
        Library cells to match against (``CellLibrary.cells``).
    period_nm : float
        Lattice period (nearest-neighbour distance).
    lattice : {"square", "hexagonal"}
        Lattice type (hexagonal rows run along x, odd rows shifted by half a period).
    layer : (int, int)
        Layer and datatype of the structures.
    origin_um : (float, float)
        Position of site (0, 0).
    size_tol_nm : float
        Largest accepted Chebyshev distance between measured and library sizes (nm), after bias removal.
    bias_nm : float
        Known process bias per edge applied when the mask was written (sizes grow by ``2 bias_nm``).
    unmatched : {"error", "nearest", "drop"}
        What to do with elements beyond ``size_tol_nm``: raise, keep the nearest cell, or leave the site empty.
    where : str
        Name of the mask for messages.

    Returns
    -------
    DecodedSites

    Raises
    ------
    MaskReadError
        No structures on ``layer``; an element beyond tolerance with ``unmatched="error"``; more than half of the
        elements off the lattice (wrong period, lattice or origin).

    Notes
    -----
    Square lattice: ``i = rint((x - x0) / p)``, ``j = rint((y - y0) / p)``.  Hexagonal:
    ``j = rint((y - y0) / (p sqrt(3) / 2))``, ``i = rint((x - x0) / p - (j mod 2) / 2)``.
    With integer-nanometre centres and vertices snapped half-to-even about the centre, the vertex mean is the
    centre exactly and the rotation error is bounded by the snapping (about 0.3 degree for a 250 x 85 nm fin on a
    1 nm grid).
    """
    if lattice not in ("square", "hexagonal"):
        raise MetalayError(f"{where}: lattice = {lattice!r}; allowed: 'square', 'hexagonal'")
    if unmatched not in ("error", "nearest", "drop"):
        raise MetalayError(f"{where}: unmatched = {unmatched!r}; allowed: 'error', 'nearest', 'drop'")
    if not period_nm > 0:
        raise MetalayError(f"{where}: period_nm = {period_nm!r} must be > 0")
    sel = (flat.layer == layer[0]) & (flat.datatype == layer[1])
    n_poly = int(sel.sum())
    if n_poly == 0:
        raise MaskReadError(f"{where}: no polygons on structure layer {layer[0]}/{layer[1]}")
    sub = flat.select(sel) if n_poly < flat.count else flat
    shapes = polygon_shapes(sub.start, sub.xy_db, flat.db_unit_nm)
    return sites_from_shapes(shapes, cell_shape_table(cells), period_nm=period_nm, lattice=lattice,
                             origin_um=origin_um, size_tol_nm=size_tol_nm, bias_nm=bias_nm, unmatched=unmatched,
                             where=where)


def sites_from_shapes(shapes: ShapeTable, cs: CellShapes, *, period_nm: float, lattice: str = "square",
                      origin_um=(0.0, 0.0), size_tol_nm: float = 3.0, bias_nm: float = 0.0,
                      unmatched: str = "error", where: str = "mask", what: str = "structure polygons"
                      ) -> DecodedSites:
    """Match measured element shapes to library cells and place them on the lattice (the second half of
    :func:`decode_sites`, shared with the decoder of complement-tone masks, :mod:`metalay.checks.openings`).

    Parameters
    ----------
    shapes : ShapeTable
        One measured element per entry (centre, rotation, long and short size).
    cs : CellShapes
        Library cells in the same size measure as ``shapes`` (:func:`cell_shape_table`).
    period_nm, lattice, origin_um, size_tol_nm, bias_nm, unmatched, where
        As in :func:`decode_sites`.
    what : str
        What the elements are, for messages.

    Returns
    -------
    DecodedSites
    """
    if lattice not in ("square", "hexagonal"):
        raise MetalayError(f"{where}: lattice = {lattice!r}; allowed: 'square', 'hexagonal'")
    if unmatched not in ("error", "nearest", "drop"):
        raise MetalayError(f"{where}: unmatched = {unmatched!r}; allowed: 'error', 'nearest', 'drop'")
    n_poly = int(shapes.a_nm.size)
    if n_poly == 0:
        raise MaskReadError(f"{where}: no {what} to decode")
    best, err = _match(shapes, cs, bias_nm)
    bad = ~(err <= size_tol_nm)
    n_bad = int(bad.sum())
    if n_bad and unmatched == "error":
        k = int(np.flatnonzero(bad)[0])
        raise MaskReadError(
            f"{where}: {n_bad} {what} match no library cell within {size_tol_nm:g} nm, e.g. one at "
            f"({shapes.x_nm[k] / 1000:.3f}, {shapes.y_nm[k] / 1000:.3f}) um measuring {shapes.a_nm[k]:.1f} x "
            f"{shapes.b_nm[k]:.1f} nm (bias_nm = {bias_nm:g}); pass the mask's bias, a larger tolerance, or "
            "unmatched='nearest'" + ("; a complement-tone mask holds film pieces: decode it with its design"
                                     if what == "structure polygons" else ""))
    keep = np.ones(n_poly, bool) if unmatched != "drop" else ~bad
    ii, jj, offset = _lattice_indices(shapes, period_nm, lattice, origin_um)
    off = offset > period_nm / 4
    n_off = int(off.sum())
    if n_off > n_poly // 2:
        raise MaskReadError(f"{where}: {n_off} of {n_poly} structures lie more than a quarter period from a "
                            f"{lattice} lattice of period {period_nm:g} nm with origin ({origin_um[0]:g}, "
                            f"{origin_um[1]:g}) um; check the library period, lattice and origin")
    keep &= ~off
    idx, every, n_dup = _one_per_site(ii, jj, keep)

    def take(a):  # no gather when every polygon is kept in file order
        return a if every else a[idx]

    rot = take(shapes.rotation_rad)
    if not cs.rotates.all():
        rot = np.where(cs.rotates[take(best)], rot, 0.0)
    stats = {
        "polygons": n_poly,
        "sites": int(idx.size),
        "unmatched": n_bad,
        "off_lattice": n_off,
        "duplicates": n_dup,
        "max_size_error_nm": float(np.max(take(err))) if idx.size else 0.0,
        "max_center_offset_nm": float(np.max(take(offset))) if idx.size else 0.0,
        "size_tolerance_nm": float(size_tol_nm),
        "bias_nm": float(bias_nm),
        "unmatched_policy": unmatched,
    }
    return DecodedSites(i=take(ii), j=take(jj), x_um=take(shapes.x_nm) * 1e-3, y_um=take(shapes.y_nm) * 1e-3,
                        cell=take(best).astype(np.int32, copy=False), rotation_rad=rot, size_error_nm=take(err),
                        lattice=lattice, period_nm=float(period_nm), origin_um=(float(origin_um[0]),
                                                                                 float(origin_um[1])),
                        stats=stats)
