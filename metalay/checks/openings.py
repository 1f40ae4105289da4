"""Complement-tone masks: the openings (slots, holes) decoded from the written film pieces.

A complement-tone mask holds the film around the elements, not the elements: inside the region ``R`` the writer
wrote ``R ∩ box - union(elements)`` band by band as hole-free pieces cut along vertical lines
(:func:`metalay.mask.process.complement_tile`). The elements are the openings, ``R - union(pieces)``. This
module recovers them from the pieces as written, on the same region and band boxes as the writer
(:func:`metalay.mask.process.complement_layout`), and hands them to the same matching and lattice placement as
the structure decoder (:func:`metalay.checks.decode.sites_from_shapes`), so the optical check and the studies
judge a complement-tone mask exactly like a structures-tone one.

Method (vectorised over strips, one band at a time)
    Each band box is cut into vertical strips at every lattice column (both parities on a hexagonal lattice),
    at the write-field boundaries and at the box edges. The writer's cut lines pass through element centres, which
    lie on lattice columns, so these strips refine the writer's strips: the pieces overlapping one strip come from
    one writer strip and do not touch each other (where they do, e.g. around an element shifted off its column
    at a write-field edge, they are merged by a true union, :func:`metalay.mask.process.strip_unions`). Per strip,
    ``strip ∩ R ∩ box - pieces`` is one shapely call over all strips of a chunk; its parts are pieces of openings
    (an opening is split by the strip and band lines through it). Area moments are additive, so each part's
    moments are computed exactly from its vertices (Green's theorem) and summed per lattice site (the site of the
    part's centroid: a part of a convex element lies inside the element, hence inside its site's cell).

Measure of an opening
    From the summed moments: area ``A``, centroid ``c`` and the central second moments ``C``. The long axis is
    ``0.5 atan2(2 C_xy, C_xx - C_yy)`` (mod pi); the moment-equivalent sizes are ``L = sqrt(12 l_1 / A)`` and
    ``W = sqrt(12 l_2 / A)`` with ``l_1 >= l_2`` the eigenvalues of ``C`` (exact length and width for a
    rectangle). Library cells are measured the same way from their outlines after the mask's bias, so any cell
    kind (slot, fin, ellipse, disk) matches by the same Chebyshev size distance as the structure decoder.

Decoding tolerance
    The openings' vertices are the written ones: the element outlines as snapped by the writer, plus the points
    where the writer's cut lines cross them, rounded half-to-even in y (at most half a database unit). Measured
    on ``examples/axicon-slots-1550.toml`` (7,661 slots) against the structure decoder reading the same design
    written in structures tone: the same sites and cells, rotations within 0.07 deg (the two decoders measure the
    same snapped outline by area moments and by edge directions), centres identical; optical figures within 1e-5
    (relative: designed spot 5e-6, purity 1e-6, converted power 1e-10). The tests allow 0.3 deg (the 1 nm
    snapping limit of a 500 x 180 nm slot) and 1e-3.

Parts thinner than half a database unit (``2 A / perimeter < 0.5`` units) are rounding slivers where the writer's
rounded piece boundary leaves the exact region boundary; they are dropped and counted.

References
----------
Green's theorem moments of a polygon: Steger 1996, "On the calculation of arbitrary moments of polygons",
Technical report FGBV-96-05, TU Muenchen (From memory: the formulas are re-derived in the docstring of
:func:`polygon_moments` and tested against the closed forms of a rectangle and an ellipse).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np
import shapely

from metalay.checks.decode import CellShapes, DecodedSites, ShapeTable, _lattice_indices, sites_from_shapes
from metalay.errors import MaskReadError, MetalayError

__all__ = ["PolygonMoments", "polygon_moments", "moment_sizes", "outline_moment_sizes", "cell_moment_table",
           "decode_openings", "decode_written", "written_layer", "tone_of", "SLIVER_THICKNESS_DB"]

#: Parts of the openings thinner than this (``2 * area / perimeter``, database units) are rounding slivers.
SLIVER_THICKNESS_DB = 0.5
_SQRT3 = math.sqrt(3.0)


@dataclass(frozen=True, eq=False)
class PolygonMoments:
    """Area moments of polygons about a reference point each (parallel arrays of length P).

    Attributes
    ----------
    ref_x, ref_y : ndarray float64
        Reference point of each polygon.
    area : ndarray
        ``A = int dA``.
    mx, my : ndarray
        First moments ``int x dA``, ``int y dA`` (``x, y`` relative to the reference).
    sxx, syy, sxy : ndarray
        Second moments ``int x^2 dA``, ``int y^2 dA``, ``int x y dA`` (relative to the reference).
    """

    ref_x: np.ndarray
    ref_y: np.ndarray
    area: np.ndarray
    mx: np.ndarray
    my: np.ndarray
    sxx: np.ndarray
    syy: np.ndarray
    sxy: np.ndarray

    def shifted(self, to_x: np.ndarray, to_y: np.ndarray) -> "PolygonMoments":
        """The same moments about the points ``(to_x, to_y)`` (parallel-axis theorem; exact)."""
        dx, dy = self.ref_x - to_x, self.ref_y - to_y
        a = self.area
        return PolygonMoments(np.asarray(to_x, float), np.asarray(to_y, float), a, self.mx + dx * a,
                              self.my + dy * a, self.sxx + 2 * dx * self.mx + dx * dx * a,
                              self.syy + 2 * dy * self.my + dy * dy * a,
                              self.sxy + dx * self.my + dy * self.mx + dx * dy * a)


def polygon_moments(polys: np.ndarray) -> PolygonMoments:
    """Exact area moments of shapely polygons (holes allowed), about each polygon's first exterior vertex.

    Parameters
    ----------
    polys : ndarray of shapely Polygon (P,)

    Returns
    -------
    PolygonMoments

    Notes
    -----
    Green's theorem over every ring (exterior counter-clockwise, holes clockwise), with ``c_k = x_k y_{k+1} -
    x_{k+1} y_k`` per edge::

        A = 1/2 sum c_k
        int x dA = 1/6 sum (x_k + x_{k+1}) c_k              int y dA = 1/6 sum (y_k + y_{k+1}) c_k
        int x^2 dA = 1/12 sum (x_k^2 + x_k x_{k+1} + x_{k+1}^2) c_k   (y likewise)
        int x y dA = 1/24 sum (x_k y_{k+1} + 2 x_k y_k + 2 x_{k+1} y_{k+1} + x_{k+1} y_k) c_k

    Coordinates are taken relative to the reference point first, so large mask coordinates lose no precision.
    """
    polys = np.asarray(polys, dtype=object)
    p = polys.size
    if p == 0:
        z = np.zeros(0)
        return PolygonMoments(z, z, z, z, z, z, z, z)
    polys = shapely.orient_polygons(polys)
    rings, ring_owner = shapely.get_rings(polys, return_index=True)
    xy, ring_of = shapely.get_coordinates(rings, return_index=True)
    owner = ring_owner[ring_of]
    first = np.searchsorted(owner, np.arange(p))  # the first exterior vertex of each polygon
    ref = xy[first]
    loc = xy - ref[owner]
    same = ring_of[1:] == ring_of[:-1]  # closed rings: consecutive vertices of one ring form an edge
    x0, y0 = loc[:-1, 0][same], loc[:-1, 1][same]
    x1, y1 = loc[1:, 0][same], loc[1:, 1][same]
    who = owner[:-1][same]
    c = x0 * y1 - x1 * y0

    def total(w):
        return np.bincount(who, weights=w, minlength=p)

    return PolygonMoments(ref[:, 0].copy(), ref[:, 1].copy(), total(c) / 2, total((x0 + x1) * c) / 6,
                          total((y0 + y1) * c) / 6, total((x0 * x0 + x0 * x1 + x1 * x1) * c) / 12,
                          total((y0 * y0 + y0 * y1 + y1 * y1) * c) / 12,
                          total((x0 * y1 + 2 * x0 * y0 + 2 * x1 * y1 + x1 * y0) * c) / 24)


def moment_sizes(area, mx, my, sxx, syy, sxy):
    """Centroid, long-axis angle and moment-equivalent sizes from (summed) moments about a reference point.

    Returns
    -------
    (cx, cy, rotation_rad, long, short) : ndarrays
        Centroid relative to the reference; long-axis angle in [0, pi); ``L = sqrt(12 l_1 / A)``,
        ``W = sqrt(12 l_2 / A)`` (``l_1 >= l_2`` eigenvalues of the central second-moment matrix): the length and
        width of a rectangle exactly.

    Notes
    -----
    A rectangle L x W has central second moments ``A L^2 / 12`` and ``A W^2 / 12`` about its axes (Roark's
    Formulas for Stress and Strain, table of properties of plane areas).
    """
    a = np.asarray(area, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        cx, cy = mx / a, my / a
        cxx = sxx - a * cx * cx
        cyy = syy - a * cy * cy
        cxy = sxy - a * cx * cy
    half = 0.5 * (cxx + cyy)
    rad = np.hypot(0.5 * (cxx - cyy), cxy)
    rot = np.mod(0.5 * np.arctan2(2 * cxy, cxx - cyy), np.pi)
    rot[rot >= np.pi] = 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        long = np.sqrt(np.maximum(12 * (half + rad) / a, 0.0))
        short = np.sqrt(np.maximum(12 * (half - rad) / a, 0.0))
    return cx, cy, rot, long, short


def outline_moment_sizes(outline_nm: np.ndarray) -> tuple[float, float]:
    """Moment-equivalent (long, short) size of one outline ``(V, 2)`` (nm), as :func:`moment_sizes` measures it."""
    m = polygon_moments(np.array([shapely.Polygon(np.asarray(outline_nm, dtype=np.float64))], dtype=object))
    _, _, _, long, short = moment_sizes(m.area, m.mx, m.my, m.sxx, m.syy, m.sxy)
    return float(long[0]), float(short[0])


def cell_moment_table(cells, *, bias_nm: float = 0.0, bias_corners: str = "sharp") -> CellShapes:
    """Library cells measured like openings: moment-equivalent sizes of each outline after the mask's bias.

    Parameters
    ----------
    cells : sequence of CellSpec
    bias_nm : float
        Bias per edge written into the mask (:func:`metalay.mask.process.bias_outline_nm`).
    bias_corners : {"sharp", "chamfer"}

    Returns
    -------
    CellShapes
        For :func:`metalay.checks.decode.sites_from_shapes` with ``bias_nm=0`` (the bias is already applied).
    """
    from metalay.cells.cellkinds import is_rotation_invariant, outline_nm
    from metalay.mask.process import bias_outline_nm

    a, b, rect, rotates = [], [], [], []
    for cell in cells:  # library cells (short axis)
        outline = bias_outline_nm(outline_nm(cell), bias_nm, corner=bias_corners) if bias_nm else outline_nm(cell)
        la, lb = outline_moment_sizes(outline)
        a.append(la)
        b.append(lb)
        rect.append(cell.kind in ("nanofin", "slot"))
        rotates.append(not is_rotation_invariant(cell))
    return CellShapes(np.array(rect, bool), np.array(a, float), np.array(b, float), np.array(rotates, bool))


def _piece_bounds(start: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """Bounding boxes (P, 4) ``(x0, y0, x1, y1)`` of a vertex table, vectorised (``reduceat`` over polygons)."""
    s = start[:-1]
    return np.stack([np.minimum.reduceat(xy[:, 0], s), np.minimum.reduceat(xy[:, 1], s),
                     np.maximum.reduceat(xy[:, 0], s), np.maximum.reduceat(xy[:, 1], s)], axis=1)


def _column_lines(x0: int, x1: int, lattice: str, period_db: float, origin_db: float) -> np.ndarray:
    """Integer x of every lattice column strictly inside ``(x0, x1)`` (both row parities on a hexagonal lattice),
    rounded like the writer rounds site centres (``numpy.rint``)."""
    step = period_db / 2 if lattice == "hexagonal" else period_db
    k0 = math.floor((x0 - origin_db) / step) - 1
    k1 = math.ceil((x1 - origin_db) / step) + 1
    xs = np.rint(origin_db + np.arange(k0, k1 + 1) * step).astype(np.int64)
    return xs[(xs > x0) & (xs < x1)]


@dataclass
class _Tally:
    """Per-run counters of the decoding (summed over bands in band order)."""

    parts: int = 0
    slivers: int = 0
    sliver_area_db2: float = 0.0
    opening_area_db2: float = 0.0
    strips: int = 0
    bands_with_pieces: int = 0


def _site_of(cx, cy, grid) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Nearest lattice site of points (database units): indices and site centres (database units).

    Square lattice: rounding each coordinate. Hexagonal lattice: the nearer of the best sites of the two rows
    around the point (rounding the row first is not the nearest site near a cell's slanted edges, where the parts
    of an element's tip lie).
    """
    period_nm, lattice, origin_um, db = grid
    p_db = period_nm / db
    ox, oy = origin_um[0] * 1000.0 / db, origin_um[1] * 1000.0 / db
    if lattice == "square":
        pts = SimpleNamespace(x_nm=cx * db, y_nm=cy * db)
        ii, jj, _ = _lattice_indices(pts, period_nm, lattice, origin_um)
        return ii, jj, ii * p_db + ox, jj * p_db + oy
    rp = p_db * _SQRT3 / 2
    j0 = np.floor((cy - oy) / rp).astype(np.int64)
    best = None
    for jj in (j0, j0 + 1):  # the two rows around each point
        half = 0.5 * (jj % 2)
        ii = np.rint((cx - ox) / p_db - half).astype(np.int64)
        sx, sy = (ii + half) * p_db + ox, jj * rp + oy
        d2 = (cx - sx) ** 2 + (cy - sy) ** 2
        if best is None:
            best = [ii, jj, sx, sy, d2]
        else:
            closer = d2 < best[4]
            for k, v in enumerate((ii, jj, sx, sy, d2)):
                best[k] = np.where(closer, v, best[k])
    return best[0], best[1], best[2], best[3]


def _band_openings(pieces, bounds, box_db, region, layout, grid, tally: _Tally, strips_per_chunk: int):
    """Moments of the openings of one band, summed per lattice site.

    Parameters
    ----------
    pieces : ndarray of shapely Polygon
        The written pieces that overlap the band box.
    bounds : ndarray (P, 4)
        Their bounding boxes.

    Returns
    -------
    (ii, jj, PolygonMoments about each site centre) for the sites with an opening part in this band.
    """
    from metalay.mask.process import strip_unions

    x0, y0, x1, y1 = (int(v) for v in box_db)
    box = shapely.box(x0, y0, x1, y1)
    region_box = shapely.intersection(region, box)
    if shapely.is_empty(region_box) or shapely.area(region_box) == 0:
        return None
    period_nm, lattice, origin_um, db = grid
    cuts = [_column_lines(x0, x1, lattice, period_nm / db, origin_um[0] * 1000.0 / db)]
    extra = layout.field_cuts_db(x0, x1)
    if extra is not None:
        cuts.append(extra[(extra > x0) & (extra < x1)])
    xs = np.concatenate([[x0], np.unique(np.concatenate(cuts)), [x1]]).astype(np.int64)
    n_strips = xs.size - 1
    tally.strips += n_strips
    # strips each piece overlaps with positive area: [a, b)
    a = np.clip(np.searchsorted(xs, bounds[:, 0], side="right") - 1, 0, n_strips - 1)
    b = np.clip(np.searchsorted(xs, bounds[:, 2], side="left"), a + 1, n_strips)
    rect = shapely.equals(region_box, box)
    parts_all = []
    for s0 in range(0, n_strips, strips_per_chunk):  # chunks of strips (memory bound), never sites
        s1 = min(n_strips, s0 + strips_per_chunk)
        strips = shapely.box(xs[s0:s1], y0, xs[s0 + 1:s1 + 1], y1)
        if not rect:
            strips = shapely.intersection(strips, region_box)
        parts = shapely.get_parts(shapely.difference(strips, strip_unions(pieces, a, b, s0, s1)))
        parts = parts[shapely.get_type_id(parts) == 3]
        parts_all.append(parts[shapely.area(parts) > 0])
    parts = np.concatenate(parts_all) if parts_all else np.zeros(0, object)
    area = shapely.area(parts)
    sliver = 2 * area < SLIVER_THICKNESS_DB * shapely.length(parts)
    tally.slivers += int(sliver.sum())
    tally.sliver_area_db2 += float(area[sliver].sum())
    parts = parts[~sliver]
    tally.parts += int(parts.size)
    if parts.size == 0:
        return None
    m = polygon_moments(parts)
    tally.opening_area_db2 += float(m.area.sum())
    ii, jj, sx, sy = _site_of(m.ref_x + m.mx / m.area, m.ref_y + m.my / m.area, grid)
    m = m.shifted(sx, sy)
    return _sum_per_site(ii, jj, m)


def _sum_per_site(ii, jj, m: PolygonMoments):
    """Sum moments (all about their own site centre) over entries of the same site; sites in (j, i) order."""
    order = np.lexsort((ii, jj))
    ii, jj = ii[order], jj[order]
    first = np.ones(ii.size, bool)
    first[1:] = (ii[1:] != ii[:-1]) | (jj[1:] != jj[:-1])
    starts = np.flatnonzero(first)

    def add(v):
        return np.add.reduceat(v[order], starts) if v.size else v

    return ii[starts], jj[starts], PolygonMoments(m.ref_x[order][starts], m.ref_y[order][starts], add(m.area),
                                                 add(m.mx), add(m.my), add(m.sxx), add(m.syy), add(m.sxy))


def _concat_moments(chunks) -> tuple[np.ndarray, np.ndarray, PolygonMoments]:
    ii = np.concatenate([c[0] for c in chunks])
    jj = np.concatenate([c[1] for c in chunks])
    fields = ("ref_x", "ref_y", "area", "mx", "my", "sxx", "syy", "sxy")
    return ii, jj, PolygonMoments(*(np.concatenate([getattr(c[2], f) for c in chunks]) for f in fields))


def decode_openings(flat, cells, layout, *, period_nm: float, lattice: str = "square", layer=(1, 0),
                    origin_um=(0.0, 0.0), size_tol_nm: float = 3.0, bias_nm: float = 0.0,
                    bias_corners: str = "sharp", unmatched: str = "error", where: str = "mask",
                    strips_per_chunk: int = 512) -> DecodedSites:
    """Identify the opening (element) at every lattice site of a complement-tone mask from its written pieces.

    Parameters
    ----------
    flat : FlatPolygons
        Polygons of the mask (:func:`metalay.io.gdsread.read_mask`); the pieces are those on
        ``(layer[0], layout.datatype)``.
    cells : sequence of CellSpec
        Library cells to match.
    layout : metalay.mask.process.ComplementLayout
        Region, band boxes and write-field cut lines the writer used (:func:`metalay.mask.process.complement_layout`
        of the design).
    period_nm, lattice, origin_um
        The lattice (as in :func:`metalay.checks.decode.decode_sites`).
    layer : (int, int)
        The structures layer (its number is the pieces' layer; the datatype comes from ``layout``).
    size_tol_nm : float
        Largest accepted Chebyshev distance between measured and library moment sizes (nm).
    bias_nm, bias_corners
        The bias written into the mask (the library outlines are biased the same way before measuring).
    unmatched : {"error", "nearest", "drop"}
    where : str
        Name of the mask for messages.
    strips_per_chunk : int
        Strips per vectorised shapely call (bounds memory).

    Returns
    -------
    DecodedSites
        ``stats`` adds ``tone`` ("complement"), ``pieces``, ``bands``, ``strips``, ``opening_parts``,
        ``slivers_dropped``, ``sliver_area_nm2`` and ``opening_area_um2``.

    Raises
    ------
    MaskReadError
        No pieces on the layer; no openings; an opening beyond tolerance with ``unmatched="error"``.

    Notes
    -----
    Memory is bounded by one band: only the pieces overlapping the current band become shapely polygons, and the
    band's openings are reduced to per-site moment sums (8 numbers per site) before the next band.
    """
    if unmatched not in ("error", "nearest", "drop"):
        raise MetalayError(f"{where}: unmatched = {unmatched!r}; allowed: 'error', 'nearest', 'drop'")
    sel = (flat.layer == layer[0]) & (flat.datatype == layout.datatype)
    n_pieces = int(sel.sum())
    if n_pieces == 0:
        raise MaskReadError(f"{where}: no film pieces on layer {layer[0]}/{layout.datatype} (tone 'complement')")
    sub = flat.select(sel) if n_pieces < flat.count else flat
    db = float(flat.db_unit_nm)
    bounds = _piece_bounds(sub.start, sub.xy_db)
    grid = (float(period_nm), lattice, (float(origin_um[0]), float(origin_um[1])), db)
    tally = _Tally()
    chunks = []
    for band in layout.bands:  # bands of lattice rows (a few hundred at most), never sites
        bx0, by0, bx1, by1 = band.box_db
        idx = np.flatnonzero((bounds[:, 3] > by0) & (bounds[:, 1] < by1) & (bounds[:, 2] > bx0)
                             & (bounds[:, 0] < bx1))
        pieces = _polygons(sub, idx)
        tally.bands_with_pieces += int(idx.size > 0)
        got = _band_openings(pieces, bounds[idx], band.box_db, layout.region, layout, grid, tally, strips_per_chunk)
        if got is not None:
            chunks.append(got)
    if not chunks:
        raise MaskReadError(f"{where}: the film pieces leave no openings inside the region (tone 'complement')")
    ii, jj, m = _sum_per_site(*_concat_moments(chunks))  # openings split by a band edge meet here
    cx, cy, rot, long, short = moment_sizes(m.area, m.mx, m.my, m.sxx, m.syy, m.sxy)
    shapes = ShapeTable(x_nm=(m.ref_x + cx) * db, y_nm=(m.ref_y + cy) * db, rotation_rad=rot,
                        a_nm=(long * db).astype(np.float32), b_nm=(short * db).astype(np.float32),
                        is_rect=np.ones(ii.size, bool))
    cs = cell_moment_table(cells, bias_nm=bias_nm, bias_corners=bias_corners)
    decoded = sites_from_shapes(shapes, cs, period_nm=period_nm, lattice=lattice, origin_um=origin_um,
                                size_tol_nm=size_tol_nm, bias_nm=0.0, unmatched=unmatched, where=where,
                                what="openings")
    decoded.stats.update({"tone": "complement", "pieces": n_pieces, "bands": len(layout.bands),
                          "strips": tally.strips, "opening_parts": tally.parts, "slivers_dropped": tally.slivers,
                          "sliver_area_nm2": tally.sliver_area_db2 * db * db,
                          "opening_area_um2": tally.opening_area_db2 * (db * 1e-3) ** 2, "bias_nm": float(bias_nm),
                          "size_measure": "moment-equivalent length and width (sqrt(12 l / A))"})
    return decoded


def _polygons(sub, idx: np.ndarray) -> np.ndarray:
    """Shapely polygons of the pieces ``idx`` of a vertex table (built per band: bounded memory)."""
    if idx.size == 0:
        return np.zeros(0, dtype=object)
    counts = np.diff(sub.start)[idx]
    verts = sub.xy_db[np.repeat(sub.start[idx], counts) + (np.arange(counts.sum())
                                                           - np.repeat(np.cumsum(counts) - counts, counts))]
    return shapely.polygons(shapely.linearrings(verts.astype(np.float64), indices=np.repeat(np.arange(idx.size),
                                                                                            counts)))


def tone_of(design) -> str:
    """The tone a design's mask was written in (``"structures"`` without a design)."""
    mask = getattr(design, "mask", None)
    return str(getattr(mask, "tone", "structures") or "structures")


def written_layer(design, layer) -> tuple[int, int]:
    """Layer/datatype holding what the decoder reads: the structures, or the film pieces of tone "complement"."""
    if tone_of(design) == "complement":
        from metalay.mask.process import complement_layout

        return int(layer[0]), complement_layout(design).datatype
    return int(layer[0]), int(layer[1])


def decode_written(flat, cells, design, *, period_nm: float, lattice: str, layer, size_tol_nm: float = 3.0,
                   bias_nm: float = 0.0, unmatched: str = "error", where: str = "mask") -> DecodedSites:
    """Decode a written mask in either tone: the structure polygons, or the openings between the film pieces.

    Parameters
    ----------
    flat : FlatPolygons
    cells : sequence of CellSpec
    design : Design or None
        Gives the tone and, for tone "complement", the region, bands and bias corners the writer used.
    period_nm, lattice, layer, size_tol_nm, bias_nm, unmatched, where
        As in :func:`metalay.checks.decode.decode_sites`.

    Returns
    -------
    DecodedSites
    """
    from metalay.checks.decode import decode_sites

    if tone_of(design) == "complement":
        from metalay.mask.process import complement_layout

        return decode_openings(flat, cells, complement_layout(design), period_nm=period_nm, lattice=lattice,
                               layer=layer, size_tol_nm=size_tol_nm, bias_nm=bias_nm,
                               bias_corners=design.mask.bias_corners, unmatched=unmatched, where=where)
    return decode_sites(flat, cells, period_nm=period_nm, lattice=lattice, layer=tuple(layer),
                        size_tol_nm=size_tol_nm, bias_nm=bias_nm, unmatched=unmatched, where=where)
