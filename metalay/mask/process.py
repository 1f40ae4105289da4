"""Process realism: bias, tone inversion, write fields, alignment marks, dose datatypes, complementary (slot) cells.

Pure, vectorised functions that act on the per-tile arrays of the compile pipeline: ``centres_db`` (N, 2) int64
site centres, ``offsets_db`` (N, V, 2) int32 snapped outlines relative to the centre (see
:mod:`metalay.mask.layout`), rotations in radians, plus aperture / lattice objects. Nothing here writes files.

Bias (grow or shrink every structure by a signed distance ``b``)
    Applied to the unrotated cell outline *before* rotation and snapping (:func:`bias_outline_nm`); rotation
    commutes with a parallel offset, so the biased, rotated outline is exact up to the usual 1-unit snapping.
    Every edge moves outwards (b > 0) or inwards (b < 0) by ``|b|`` along its normal. Corner treatment:

    ``"sharp"``
        The moved edges are extended until they meet (the mitre join of CAD offsetting): a rectangle
        L x W becomes exactly (L + 2b) x (W + 2b), corners stay square.
    ``"chamfer"``
        Each convex corner is cut by the line perpendicular to the corner bisector at distance ``b`` from the
        original vertex (tangent to the rounded corner that isotropic growth would give). A corner of exterior
        angle a loses a triangle of area ``b^2 tan(a/4) (1/cos(a/2) - 1)``; for a rectangle that is
        ``(L + 2b)(W + 2b) - 4 (sqrt(2) - 1)^2 b^2``. Each grown vertex becomes two, so V doubles.

    Shrinking a convex outline (b < 0) moves the edges inwards; the result is the exact erosion by a disk, which has
    sharp corners for either setting (chamfer acts only where material is added).

Tone (write the structures, or their complement inside a region)
    :func:`complement_tile` computes, inside one integer box, ``region - union(elements)`` with shapely 2
    (vectorised over strips) and returns it as hole-free polygons on the integer grid. Cut-line scheme (GDSII
    boundaries cannot have holes): the box is cut into vertical strips by lines ``x = c`` through the (integer)
    centre of every element whose centre lies inside the box, plus the box edges and any write-field boundaries.
    Each element is convex and contains its centre, so the line through its centre passes through its interior:
    a connected hole that meets a cut line cannot lie inside one strip, so each strip piece is hole-free (proof:
    a component of hole-within-strip that did not touch the strip's sides would be the whole hole, contradicting
    that a cut line crosses it). Pieces that still carry a hole (e.g. the inner disk of an annulus) or exceed the
    vertex limit are cut again through the hole (vertical) or across the middle (horizontal) until clean.
    Vertices on cut lines have integer x; their y is rounded half-to-even to the grid (numpy.rint), the same
    value in both neighbouring pieces, so the output tiles the region without overlap. Every vertex moves at most
    half a unit, so the XOR area between the union of the output and the exact region is bounded by
    ``(sqrt(2)/2) * perimeter`` (in units^2); :func:`complement_tile` measures it when ``verify=True``.
    Tiles are bands of lattice rows (:func:`complement_bands`) whose boxes share edges exactly, so the union over
    tiles is the whole region; memory is bounded by the band size (elements are processed in chunks of strips).

Write fields (e-beam fields of size W x H from an origin)
    An element "straddles" when its bounding box crosses a field boundary strictly (``lo < B < hi``). Writing
    it in two fields makes its two halves subject to the stitching error between fields (typically tens of nm),
    which deforms the element. Choice made here (mode ``"shift"``): keep the lattice and the field grid as given
    and move only each straddling element perpendicular to the boundary by the smallest whole-unit amount that
    puts its bounding box entirely in one field (towards the nearer side). A move is accepted only if it is at
    most ``max_shift_nm`` and does not bring the element closer to any neighbour than the min-gap rule allows
    (or than it already was); otherwise the element is tried the other way and, failing that, kept where it is
    (still straddling, counted as ``kept_straddling``): no element is left out unless the design says so. The
    geometric phase is set by the element's rotation, which is unchanged: the error is that the element now
    samples the target phase at a displaced point, ``|grad phi| * |shift|`` to first order
    (:func:`shift_phase_error_rad`). Mode ``"shift-or-drop"`` leaves out the elements that cannot be shifted,
    ``"drop"`` leaves every straddling element out, ``"keep"`` writes them as they are; all modes report the
    counts. Choosing the field origin so boundaries fall between cells (e.g. on the
    cell edges, when the field size is a multiple of the period) avoids straddling entirely and is the best
    setting where the tool allows it.

Marks, labels, dose datatypes
    :func:`alignment_marks` draws crosses or squares (integer grid) at given positions; :func:`check_marks_clear`
    refuses marks that touch a keep-out region (aperture plus frame). :func:`dose_datatype_lut` maps structure
    classes (cell ids and purposes) to GDSII datatypes for exposure tools that assign doses by datatype.

Complementary (slot) cells
    :func:`babinet_slot_response` gives the slot (aperture in a thin metal film) response from the complementary
    antenna response by Babinet's principle (Booker's form for polarised fields); :func:`babinet_slot_library`
    builds a slot library labelled as such an estimate. A solver-computed slot library is preferred when present.

References
----------
Calma Company, GDSII Stream Format Manual, Release 6.0 (1987): at most 8191 XY points per BOUNDARY element
(8190 distinct vertices plus the closing point); boundaries are simple polygons without holes.
H. G. Booker, "Slot aerials and their relation to complementary wire aerials (Babinet's principle)",
J. IEE 93 (IIIA), 620-626 (1946).
F. Falcone et al., "Babinet principle applied to the design of metasurfaces and metamaterials",
Phys. Rev. Lett. 93, 197401 (2004).
T. Zentgraf et al., "Babinet's principle for optical frequency metamaterials and nanoantennas",
Phys. Rev. B 76, 033407 (2007).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping, Sequence

import numpy as np
import shapely

from metalay.cells.cellkinds import polygon_vertex_count
from metalay.cells.library import CellLibrary, CellSpec, check_physical
from metalay.design.lattice import Aperture, Lattice, row_range
from metalay.errors import DesignError, GeometryError, LibraryError, OutputError
from metalay.io.writer import MAX_GDS_VERTICES
from metalay.mask.layout import Polygon

__all__ = [
    "BIAS_CORNERS", "STRADDLE_MODES", "MARK_KINDS", "BABINET_SOURCE",
    "offset_convex_polygons", "bias_outline_nm", "biased_dims_nm", "find_cell_at_dims",
    "aperture_region_db", "frame_region_db", "ComplementBand", "complement_bands", "ComplementTile",
    "complement_tile", "pieces_by_vertex_count",
    "WriteFieldGrid", "FieldFit", "field_index", "straddles_write_field", "fit_write_fields",
    "shift_phase_error_rad", "field_cell_name",
    "alignment_marks", "default_mark_positions_um", "check_marks_clear",
    "dose_datatype_lut",
    "babinet_slot_response", "babinet_slot_library", "babinet_screen_check",
]

BIAS_CORNERS = ("sharp", "chamfer")
STRADDLE_MODES = ("shift", "shift-or-drop", "drop", "keep")
MARK_KINDS = ("cross", "square")
BABINET_SOURCE = (
    "Babinet-principle estimate, not a solver result: t_slot(E along an axis) = 1 - t_antenna(E along the other "
    "axis), exact only for an infinitely thin perfectly conducting film with the same medium on both sides "
    "(Booker 1946, J. IEE 93 (IIIA), 620; Falcone et al. 2004, Phys. Rev. Lett. 93, 197401); at optical "
    "frequencies it holds only approximately (Zentgraf et al. 2007, Phys. Rev. B 76, 033407)")


# ------------------------------------------------------------------------------------------------------------------
# Bias
# ------------------------------------------------------------------------------------------------------------------

def offset_convex_polygons(vertices, distance, *, corner: str = "sharp") -> np.ndarray:
    """Parallel offset of convex counter-clockwise polygons, vectorised over a batch.

    Parameters
    ----------
    vertices : array_like (..., V, 2)
        Convex polygons, counter-clockwise, closing vertex not repeated.
    distance : float
        Signed offset (same unit as ``vertices``): > 0 grows, < 0 shrinks.
    corner : {"sharp", "chamfer"}
        Corner treatment where material is added (see the module docstring).

    Returns
    -------
    ndarray (..., V, 2) for "sharp" or for ``distance <= 0``; (..., 2V, 2) for "chamfer" with ``distance > 0``.

    Raises
    ------
    GeometryError
        When the polygons are not convex and counter-clockwise, or a shrink makes an edge vanish.
    DesignError
        When ``corner`` is not one of :data:`BIAS_CORNERS`.

    Notes
    -----
    With outward unit normals ``n1`` (incoming edge) and ``n2`` (outgoing edge) at a vertex ``v``, the sharp corner
    is ``v + d (n1 + n2) / (1 + n1.n2)`` (the point at distance ``d`` from both edge lines). The chamfer points are
    ``v + d u + t_k w`` with the unit bisector ``u = (n1 + n2)/|n1 + n2|``, ``w`` perpendicular to ``u`` and
    ``t_k = d (1 - n_k.u) / (n_k.w)``, i.e. the two points where the cut line at distance ``d`` meets the moved
    edge lines.
    """
    if corner not in BIAS_CORNERS:
        raise DesignError(f"corner = {corner!r}: not one of {list(BIAS_CORNERS)}")
    v = np.asarray(vertices, dtype=np.float64)
    d = float(distance)
    e = np.roll(v, -1, axis=-2) - v  # edge k from vertex k to k+1
    length = np.hypot(e[..., 0], e[..., 1])
    if np.any(length <= 0):
        raise GeometryError("polygon has a zero-length edge")
    cross = e[..., 0] * np.roll(e, -1, axis=-2)[..., 1] - e[..., 1] * np.roll(e, -1, axis=-2)[..., 0]
    if np.any(cross < -1e-9 * length * np.roll(length, -1, axis=-1)):
        raise GeometryError("polygon is not convex and counter-clockwise")
    n_out = np.stack([e[..., 1], -e[..., 0]], axis=-1) / length[..., None]  # outward normal of edge k
    n2 = n_out
    n1 = np.roll(n_out, 1, axis=-2)  # incoming edge k-1 at vertex k
    if d == 0:
        return v.copy()
    dot = np.sum(n1 * n2, axis=-1, keepdims=True)
    if corner == "sharp" or d < 0:
        out = v + d * (n1 + n2) / (1.0 + dot)
        if d < 0:
            e_new = np.roll(out, -1, axis=-2) - out
            if np.any(np.sum(e_new * e, axis=-1) <= 0):
                raise GeometryError(f"offset {d:g} makes an edge vanish")
        return out
    s = n1 + n2
    u = s / np.linalg.norm(s, axis=-1, keepdims=True)
    w = np.stack([-u[..., 1], u[..., 0]], axis=-1)
    c = np.sum(n1 * u, axis=-1)
    n1w = np.sum(n1 * w, axis=-1)
    n2w = np.sum(n2 * w, axis=-1)
    flat = np.abs(n1w) < 1e-12  # collinear vertex: no corner to cut
    t1 = np.where(flat, 0.0, d * (1.0 - c) / np.where(flat, 1.0, n1w))
    t2 = np.where(flat, 0.0, d * (1.0 - c) / np.where(flat, 1.0, n2w))
    base = v + d * u
    p1 = base + t1[..., None] * w
    p2 = base + t2[..., None] * w
    out = np.stack([p1, p2], axis=-2)  # (..., V, 2, 2): first on the incoming edge line, then the outgoing
    return out.reshape(*v.shape[:-2], 2 * v.shape[-2], 2)


def bias_outline_nm(outline_nm, bias_nm: float, *, corner: str = "sharp", where: str = "<memory>",
                    key: str = "mask.bias_nm") -> np.ndarray:
    """Bias a cell outline (rotation 0, centred, counter-clockwise) by ``bias_nm``; feed the result to
    :func:`metalay.mask.layout.element_offsets`.

    Parameters
    ----------
    outline_nm : ndarray (V, 2)
        Outline from :func:`metalay.cells.cellkinds.outline_nm`, nm.
    bias_nm : float
        Signed bias: each edge moves outwards by ``bias_nm`` (the feature grows by ``2 * bias_nm`` across).
    corner : {"sharp", "chamfer"}
        Corner treatment (module docstring).
    where, key : str
        Design file and key named in the error message.

    Returns
    -------
    ndarray (V, 2) or (2V, 2), float64 nm.

    Raises
    ------
    DesignError
        When the bias shrinks the outline until an edge vanishes.

    Notes
    -----
    For a rectangle L x W: area ``(L + 2b)(W + 2b)`` (sharp) or ``(L + 2b)(W + 2b) - 4 (sqrt(2) - 1)^2 b^2``
    (chamfer, b > 0).
    """
    o = np.asarray(outline_nm, dtype=np.float64)
    try:
        return offset_convex_polygons(o, bias_nm, corner=corner)
    except GeometryError as exc:
        lo, hi = -float(np.min(np.abs(o))), 0.0  # bisection for the largest allowed shrink (short loop)
        for _ in range(50):
            mid = 0.5 * (lo + hi)
            try:
                offset_convex_polygons(o, mid, corner="sharp")
                hi = mid
            except GeometryError:
                lo = mid
        raise DesignError(f"{where}: key '{key}' = {bias_nm!r}: {exc}; allowed > {hi:.3f} nm for this cell") \
            from exc


def biased_dims_nm(cell: CellSpec, bias_nm: float) -> dict[str, float]:
    """Nominal dimensions of ``cell`` after a bias: every dimension across the cell grows by ``2 * bias_nm``.

    Exact for rectangles (nanofin, slot) and round pillars; for an elliptic pillar the axes grow by 2b while the
    offset curve is no longer exactly an ellipse.
    """
    return {k: v + 2.0 * bias_nm for k, v in cell.dims_nm}


def find_cell_at_dims(library: CellLibrary, kind: str, dims_nm: Mapping[str, float], *,
                      tolerance_nm: float = 0.5) -> int | None:
    """Index of a library cell of ``kind`` whose dimensions all match ``dims_nm`` within ``tolerance_nm``.

    Used by the optics check to take the response at the biased size; ``None`` means the library does not have
    that size (the check should then say so and use the nominal cell).
    """
    for k, c in enumerate(library.cells):  # library cells (a short axis)
        if c.kind != kind or set(c.dims) != set(dims_nm):
            continue
        if all(abs(c.dim(n) - float(dims_nm[n])) <= tolerance_nm for n in dims_nm):
            return k
    return None


# ------------------------------------------------------------------------------------------------------------------
# Tone inversion
# ------------------------------------------------------------------------------------------------------------------

def aperture_region_db(aperture: Aperture, *, db_unit_nm: float, tolerance_nm: float = 0.5):
    """The aperture as a shapely polygon with integer vertices in database units (origin at the centre).

    Circles (and the annulus' two circles) are inscribed polygons whose sagitta is at most ``tolerance_nm``
    (vertex count from :func:`metalay.cells.cellkinds.polygon_vertex_count`).
    """
    s = 1000.0 / db_unit_nm

    def circle(d_um):
        r_nm = d_um * 500.0
        n = polygon_vertex_count(r_nm, tolerance_nm)
        t = 2 * np.pi * np.arange(n) / n
        return np.rint(np.stack([np.cos(t), np.sin(t)], axis=1) * (r_nm / db_unit_nm))

    if aperture.shape == "circle":
        return shapely.Polygon(circle(aperture.diameter_um))
    if aperture.shape == "annulus":
        return shapely.Polygon(circle(aperture.diameter_um), [circle(aperture.inner_diameter_um)[::-1]])
    hx, hy = aperture.half_extent_um
    ix, iy = int(np.rint(hx * s)), int(np.rint(hy * s))
    return shapely.box(-ix, -iy, ix, iy)


def frame_region_db(aperture: Aperture, *, margin_um: float, db_unit_nm: float):
    """The rectangle inside the frame's inner edge (same rounding as :func:`metalay.mask.layout.frame_polygons`)."""
    s = 1000.0 / db_unit_nm
    hx, hy = aperture.half_extent_um
    ix, iy = int(np.rint((hx + margin_um) * s)), int(np.rint((hy + margin_um) * s))
    return shapely.box(-ix, -iy, ix, iy)


@dataclass(frozen=True)
class ComplementBand:
    """One tile of the tone inversion: an integer box and the lattice rows whose elements can reach it.

    Attributes
    ----------
    box_db : tuple (x0, y0, x1, y1) of int
        Tile box in database units; neighbouring bands share their y edge exactly.
    rows : tuple (j0, j1)
        Half-open range of lattice rows to sample (band rows plus a halo), clipped to the aperture's rows.
    """

    box_db: tuple[int, int, int, int]
    rows: tuple[int, int]


def complement_bands(region, lattice: Lattice, aperture: Aperture, *, db_unit_nm: float, reach_nm: float,
                     rows_per_band: int = 64, field: "WriteFieldGrid | None" = None) -> list[ComplementBand]:
    """Split the region's bounding box into bands of about ``rows_per_band`` lattice rows.

    Parameters
    ----------
    region : shapely geometry
        Region to invert, database units (:func:`aperture_region_db` or :func:`frame_region_db`).
    lattice, aperture : Lattice, Aperture
    db_unit_nm : float
    reach_nm : float
        Largest distance from a site centre to any vertex of its element (circumradius after bias).
    rows_per_band : int
        Band height in lattice rows (memory and polygon size grow with it: a strip piece has about
        ``6 * rows_per_band`` vertices).
    field : WriteFieldGrid, optional
        When given, horizontal field boundaries become band edges too (no output polygon straddles a field).

    Returns
    -------
    list of ComplementBand, ordered by y.
    """
    x0, y0, x1, y1 = (int(v) for v in shapely.bounds(region))
    pitch_db = lattice.row_pitch_um * 1000.0 / db_unit_nm
    reach_db = reach_nm / db_unit_nm
    ja, jb = row_range(aperture, lattice)
    k0 = math.floor(y0 / pitch_db / rows_per_band)
    k1 = math.ceil(y1 / pitch_db / rows_per_band) + 1
    edges = np.rint((np.arange(k0, k1 + 1) * rows_per_band - 0.5) * pitch_db).astype(np.int64)
    edges = edges[(edges > y0) & (edges < y1)]
    if field is not None:
        fy = field.origin_db[1] + field.size_db[1] * np.arange(math.floor((y0 - field.origin_db[1]) / field.size_db[1]),
                                                               math.ceil((y1 - field.origin_db[1]) / field.size_db[1])
                                                               + 1)
        edges = np.union1d(edges, fy[(fy > y0) & (fy < y1)])
    edges = np.concatenate([[y0], edges, [y1]]).astype(np.int64)
    out = []
    for a, b in zip(edges[:-1], edges[1:]):  # bands (a few hundred at most), not sites
        j0 = max(ja, math.floor((a - reach_db) / pitch_db))
        j1 = min(jb, math.ceil((b + reach_db) / pitch_db) + 1)
        out.append(ComplementBand((x0, int(a), x1, int(b)), (int(j0), int(max(j0, j1)))))
    return out


@dataclass(frozen=True)
class ComplementTile:
    """Hole-free polygons of one tile of the complement (integer database units).

    Attributes
    ----------
    start : ndarray (P+1,) int64
        Polygon k has vertices ``xy_db[start[k]:start[k+1]]`` (closing vertex not repeated), counter-clockwise.
    xy_db : ndarray (M, 2) int64
    area_db2 : float
        Total area of the output polygons.
    target_area_db2 : float
        Exact area of ``region ∩ box - union(elements)`` (before rounding).
    xor_area_db2 : float
        Area of the symmetric difference between the union of the output and the exact region (nan when off).
    xor_bound_db2 : float
        Grid bound for ``xor_area_db2``: ``(sqrt(2)/2) * perimeter`` of the exact strip pieces, since every output
        vertex lies within half a unit (per coordinate) of the exact boundary (nan when off).
    n_elements : int
        Elements that intersect the box.
    max_vertices : int
        Largest vertex count of an output polygon.
    """

    start: np.ndarray
    xy_db: np.ndarray
    area_db2: float
    target_area_db2: float
    xor_area_db2: float
    xor_bound_db2: float
    n_elements: int
    max_vertices: int

    @property
    def count(self) -> int:
        return int(self.start.shape[0] - 1)

    def polygons(self) -> np.ndarray:
        """The output as an array of shapely polygons (for checks and plots)."""
        if self.count == 0:
            return np.zeros(0, dtype=object)
        counts = np.diff(self.start)
        return shapely.polygons(shapely.linearrings(self.xy_db.astype(np.float64),
                                                    indices=np.repeat(np.arange(self.count), counts)))


def complement_tile(centres_db, offsets_db, region, box_db, *, max_vertices: int = MAX_GDS_VERTICES,
                    cut_x_db=None, strips_per_chunk: int = 512, verify: bool = True) -> ComplementTile:
    """``(region ∩ box) - union(elements)`` as hole-free integer polygons (the cut-line scheme of the module).

    Parameters
    ----------
    centres_db : ndarray (N, 2) int64
        Element centres. Elements outside the box are ignored; include a halo of neighbouring rows so that every
        element that reaches into the box is present.
    offsets_db : ndarray (N, V, 2) int32
        Snapped convex outlines relative to the centres.
    region : shapely geometry or None
        Region to invert (database units); None means the whole box.
    box_db : (x0, y0, x1, y1) ints
        Tile box; boxes of neighbouring tiles must share edges.
    max_vertices : int
        Largest vertex count of an output polygon (default: the GDSII limit, 8190 distinct vertices).
    cut_x_db : array_like of int, optional
        Extra vertical cut lines (e.g. write-field boundaries).
    strips_per_chunk : int
        Strips handled per vectorised call (bounds memory).
    verify : bool
        Measure the XOR area against the exact region (an extra overlay per chunk).

    Returns
    -------
    ComplementTile

    Raises
    ------
    OutputError
        If the output cannot be made hole-free within the vertex limit.
    """
    x0, y0, x1, y1 = (int(v) for v in box_db)
    box = shapely.box(x0, y0, x1, y1)
    if region is None:
        region_box = box
    else:
        region_box = shapely.intersection(region, box)
    absv, lo, hi, cx = _elements_in_box(centres_db, offsets_db, (x0, y0, x1, y1))
    empty = ComplementTile(np.zeros(1, np.int64), np.zeros((0, 2), np.int64), 0.0, 0.0,
                           0.0 if verify else math.nan, 0.0 if verify else math.nan, int(cx.size), 0)
    if shapely.is_empty(region_box) or shapely.area(region_box) == 0:
        return empty
    cuts = cx[(cx > x0) & (cx < x1)]
    if cut_x_db is not None:
        extra = np.asarray(cut_x_db, dtype=np.int64)
        cuts = np.concatenate([cuts, extra[(extra > x0) & (extra < x1)]])
    xs = np.concatenate([[x0], np.unique(cuts), [x1]]).astype(np.int64)
    n_strips = xs.size - 1
    elem_polys = shapely.polygons(absv.astype(np.float64))
    # strips each element overlaps: [a, b)
    a = np.searchsorted(xs, lo[:, 0], side="right") - 1
    b = np.searchsorted(xs, hi[:, 0], side="left")
    a = np.clip(a, 0, n_strips - 1)
    b = np.clip(b, a + 1, n_strips)
    rect = shapely.equals(region_box, box)

    pieces_out: list[np.ndarray] = []
    area_t = xor_t = bound_t = 0.0
    for s0 in range(0, n_strips, strips_per_chunk):  # chunks of strips (memory bound), not sites
        s1 = min(n_strips, s0 + strips_per_chunk)
        strips = shapely.box(xs[s0:s1], y0, xs[s0 + 1:s1 + 1], y1)
        if not rect:
            strips = shapely.intersection(strips, region_box)
        diff = shapely.difference(strips, _strip_holes(elem_polys, a, b, s0, s1))
        parts, pid = shapely.get_parts(diff, return_index=True)
        nz = shapely.area(parts) > 0
        polys, ids = _hole_free(parts[nz], pid[nz], max_vertices)
        rounded, rid = _round_polygons(polys, ids, max_vertices)
        pieces_out.extend(rounded)
        area_t += float(np.sum(shapely.area(diff)))
        if verify:
            bound_t += float(np.sum(shapely.length(diff))) * math.sqrt(0.5)
            xor_t += _xor_area(rounded, rid, diff)
    if not pieces_out:
        return empty
    counts = np.array([len(p) for p in pieces_out], dtype=np.int64)
    start = np.zeros(counts.size + 1, dtype=np.int64)
    np.cumsum(counts, out=start[1:])
    xy = np.concatenate(pieces_out).astype(np.int64)
    area = float(np.sum(shapely.area(_ragged_polygons(pieces_out))))
    nan = math.nan
    return ComplementTile(start, xy, area, area_t, xor_t if verify else nan,
                          bound_t if verify else nan, int(cx.size), int(counts.max()))


def _elements_in_box(centres_db, offsets_db, box_db):
    """Absolute vertices, bounding boxes and centre x of the elements that reach into ``box_db``."""
    x0, y0, x1, y1 = box_db
    centres = np.asarray(centres_db, dtype=np.int64)
    absv = centres[:, None, :] + np.asarray(offsets_db).astype(np.int64)
    lo = absv.min(axis=1)
    hi = absv.max(axis=1)
    sel = np.flatnonzero((hi[:, 0] > x0) & (lo[:, 0] < x1) & (hi[:, 1] > y0) & (lo[:, 1] < y1))
    return absv[sel], lo[sel], hi[sel], centres[sel, 0]


def _strip_holes(elem_polys, a, b, s0: int, s1: int) -> np.ndarray:
    """Per strip ``s0 <= s < s1``: the elements overlapping it (strips ``[a, b)`` per element) as one multipolygon,
    a true union where elements overlap or touch; empty where there are none."""
    ea = np.maximum(a, s0)
    eb = np.minimum(b, s1)
    cnt = np.maximum(eb - ea, 0)
    has = cnt > 0
    total = int(cnt.sum())
    holes = np.empty(s1 - s0, dtype=object)
    holes[:] = shapely.from_wkt("MULTIPOLYGON EMPTY")
    if total:
        owner = np.repeat(np.flatnonzero(has), cnt[has])
        first = np.repeat(np.cumsum(cnt[has]) - cnt[has], cnt[has])
        strip = np.repeat(ea[has], cnt[has]) + (np.arange(total) - first) - s0
        order = np.argsort(strip, kind="stable")
        strip, owner = strip[order], owner[order]
        used, dense = np.unique(strip, return_inverse=True)
        mps = shapely.multipolygons(elem_polys[owner], indices=dense)
        bad = ~shapely.is_valid(mps)
        for k in np.flatnonzero(bad):  # strips whose elements overlap or touch (rare): true union
            mps[k] = shapely.union_all(shapely.get_parts(mps[k]))
        holes[used] = mps
    return holes


def _ragged_polygons(rings: list[np.ndarray]) -> np.ndarray:
    """Shapely polygons from a list of (V_k, 2) vertex arrays (closing vertex not repeated)."""
    counts = np.fromiter((len(r) for r in rings), dtype=np.int64, count=len(rings))
    return shapely.polygons(shapely.linearrings(np.concatenate(rings).astype(np.float64),
                                                indices=np.repeat(np.arange(len(rings)), counts)))


def _xor_area(rounded: list[np.ndarray], rid: np.ndarray, exact: np.ndarray) -> float:
    """Sum over strips of area(union of the strip's output pieces XOR the strip's exact region).

    Pieces of different strips cannot overlap (each lies between its strip's integer cut lines), so the strips
    can be compared one by one; this equals the XOR area of the whole tile.
    """
    got = np.empty(exact.size, dtype=object)
    got[:] = shapely.Polygon()
    if rounded:
        polys = _ragged_polygons(rounded)
        order = np.argsort(rid, kind="stable")
        used, dense = np.unique(rid[order], return_inverse=True)
        mps = shapely.multipolygons(polys[order], indices=dense)
        bad = ~shapely.is_valid(mps)
        for k in np.flatnonzero(bad):  # strips whose pieces share an edge (after extra cuts; rare)
            mps[k] = shapely.union_all(shapely.get_parts(mps[k]))
        got[used] = mps
    return float(np.sum(shapely.area(shapely.symmetric_difference(got, exact))))


def _hole_free(parts: np.ndarray, ids: np.ndarray, max_vertices: int) -> tuple[np.ndarray, np.ndarray]:
    """Cut polygons that still have holes (through the first hole, vertically) or too many vertices (across the
    middle, horizontally) until every piece is hole-free and small enough. Most pieces pass untouched.
    ``ids`` (the strip of each part) is carried along."""
    nint = shapely.get_num_interior_rings(parts)
    ncoord = shapely.get_num_coordinates(parts)
    ok = (nint == 0) & (ncoord - 1 <= max_vertices)
    if ok.all():
        return parts, ids
    done = [parts[ok]]
    done_ids = [ids[ok]]
    stack = [(g, i, 0) for g, i in zip(parts[~ok], ids[~ok])]
    while stack:  # the rare pieces only
        g, gid, depth = stack.pop()
        if depth > 64:
            raise OutputError("tone inversion: could not cut a polygon into hole-free pieces within 64 levels")
        gx0, gy0, gx1, gy1 = g.bounds
        if len(g.interiors):
            c = shapely.Polygon(g.interiors[0]).centroid.x
            cut = min(max(float(np.rint(c)), math.floor(gx0) + 1), math.ceil(gx1) - 1)
            halves = shapely.box([gx0, cut], gy0, [cut, gx1], gy1)
        elif shapely.get_num_coordinates(g) - 1 > max_vertices:
            cut = float(np.rint(0.5 * (gy0 + gy1)))
            halves = shapely.box(gx0, [gy0, cut], gx1, [cut, gy1])
        else:
            done.append(np.array([g], dtype=object))
            done_ids.append(np.array([gid]))
            continue
        for piece in shapely.get_parts(shapely.get_parts(shapely.intersection(g, halves))):
            if piece.geom_type == "Polygon" and piece.area > 0:
                stack.append((piece, gid, depth + 1))
    return np.concatenate(done), np.concatenate(done_ids)


def _round_polygons(polys: np.ndarray, ids: np.ndarray, max_vertices: int) -> tuple[list[np.ndarray], np.ndarray]:
    """Exterior rings rounded to the integer grid (numpy.rint), counter-clockwise, consecutive duplicates removed.

    Pieces that become invalid by rounding (slivers thinner than a unit) are snap-rounded by GEOS instead.
    Returns the vertex arrays (closing vertex not repeated) and the carried ``ids``.
    """
    if polys.size == 0:
        return [], np.zeros(0, dtype=np.int64)
    polys = shapely.orient_polygons(polys)
    xy, idx = shapely.get_coordinates(shapely.get_exterior_ring(polys), return_index=True)
    xy = np.rint(xy)
    keep = np.ones(len(xy), dtype=bool)
    keep[1:] = np.any(xy[1:] != xy[:-1], axis=1) | (idx[1:] != idx[:-1])
    xy, idx = xy[keep], idx[keep]
    counts = np.bincount(idx, minlength=polys.size)
    good = counts >= 4
    out: list[np.ndarray] = []
    out_ids: list[int] = []
    redo = np.flatnonzero(~good)
    if good.any():
        gidx = np.flatnonzero(good)
        sel = good[idx]
        rx = xy[sel]
        dense = np.searchsorted(gidx, idx[sel])
        rebuilt = shapely.polygons(shapely.linearrings(rx, indices=dense))
        valid = shapely.is_valid(rebuilt) & (shapely.area(rebuilt) > 0)
        bounds = np.zeros(gidx.size + 1, dtype=np.int64)
        np.cumsum(np.bincount(dense, minlength=gidx.size), out=bounds[1:])
        for k in np.flatnonzero(valid):  # slicing one concatenated array per output polygon (no geometry work)
            out.append(rx[bounds[k]:bounds[k + 1] - 1])
        out_ids.extend(ids[gidx[valid]].tolist())
        redo = np.concatenate([redo, gidx[~valid]])
    if redo.size:
        fixed, fid = shapely.get_parts(shapely.set_precision(polys[redo], 1.0), return_index=True)
        ok = (shapely.get_type_id(fixed) == 3) & (shapely.area(fixed) > 0)
        fixed, fid = fixed[ok], ids[redo][fid[ok]]
        if fixed.size:
            fixed, fid = _hole_free(fixed, fid, max_vertices)
            fixed = shapely.orient_polygons(fixed)
            fxy, fidx = shapely.get_coordinates(shapely.get_exterior_ring(fixed), return_index=True)
            fb = np.zeros(fixed.size + 1, dtype=np.int64)
            np.cumsum(np.bincount(fidx, minlength=fixed.size), out=fb[1:])
            for k in range(fixed.size):  # the rare re-snapped pieces
                out.append(fxy[fb[k]:fb[k + 1] - 1])
            out_ids.extend(fid.tolist())
    return out, np.asarray(out_ids, dtype=np.int64)


def pieces_by_vertex_count(tile: ComplementTile):
    """Group a tile's polygons by vertex count for :meth:`metalay.io.writer.GdsStream.boundaries`.

    Yields
    ------
    (V, vertices_db) with ``vertices_db`` of shape (n, V, 2) int64.
    """
    counts = np.diff(tile.start)
    for v in np.unique(counts):  # distinct vertex counts (a few hundred at most)
        ks = np.flatnonzero(counts == v)
        idx = tile.start[ks][:, None] + np.arange(v)[None, :]
        yield int(v), tile.xy_db[idx]


# ------------------------------------------------------------------------------------------------------------------
# Write fields
# ------------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class WriteFieldGrid:
    """Write fields of ``size_db`` = (W, H) with one corner at ``origin_db`` (database units)."""

    size_db: tuple[int, int]
    origin_db: tuple[int, int] = (0, 0)

    @staticmethod
    def from_um(size_um, origin_um=(0.0, 0.0), *, db_unit_nm: float) -> "WriteFieldGrid":
        """From micrometres: ``size_um`` a number (square fields) or (W, H); ``origin_um`` (x, y)."""
        s = 1000.0 / db_unit_nm
        w, h = (size_um, size_um) if np.isscalar(size_um) else size_um
        return WriteFieldGrid((int(np.rint(w * s)), int(np.rint(h * s))),
                              (int(np.rint(origin_um[0] * s)), int(np.rint(origin_um[1] * s))))


@dataclass(frozen=True)
class FieldFit:
    """Result of :func:`fit_write_fields` (arrays parallel to the input, length N).

    Attributes
    ----------
    centres_db : ndarray (N, 2) int64
        Centres after the shift (unchanged for elements not moved).
    keep : ndarray (N,) bool
        False for elements left out.
    shift_db : ndarray (N, 2) int64
        Applied shift (zero when not moved).
    straddling : ndarray (N,) bool
        Element straddled a field boundary before fitting.
    n_straddling, n_shifted, n_dropped, n_kept_straddling : int
        Counts over the active elements.
    max_shift_db : float
        Largest shift length applied.
    """

    centres_db: np.ndarray
    keep: np.ndarray
    shift_db: np.ndarray
    straddling: np.ndarray
    n_straddling: int
    n_shifted: int
    n_dropped: int
    n_kept_straddling: int
    max_shift_db: float


def field_index(xy_db, grid: WriteFieldGrid) -> np.ndarray:
    """Field (ix, iy) containing each point, (N, 2) int64 (a point on a boundary belongs to the upper field)."""
    xy = np.asarray(xy_db, dtype=np.int64)
    return np.stack([(xy[:, 0] - grid.origin_db[0]) // grid.size_db[0],
                     (xy[:, 1] - grid.origin_db[1]) // grid.size_db[1]], axis=1)


def _span_fields(lo, hi, origin, size):
    """First and last field an interval [lo, hi] occupies (touching a boundary does not count)."""
    k_lo = (lo - origin) // size
    k_hi = -((origin - hi) // size) - 1  # ceil((hi - origin)/size) - 1
    return k_lo, k_hi


def straddles_write_field(centres_db, offsets_db, grid: WriteFieldGrid) -> np.ndarray:
    """True where an element's bounding box crosses a field boundary strictly, (N,) bool."""
    c = np.asarray(centres_db, dtype=np.int64)
    o = np.asarray(offsets_db).astype(np.int64)
    lo = c + o.min(axis=1)
    hi = c + o.max(axis=1)
    out = np.zeros(c.shape[0], dtype=bool)
    for ax in (0, 1):  # two axes
        a, b = _span_fields(lo[:, ax], hi[:, ax], grid.origin_db[ax], grid.size_db[ax])
        out |= b > a
    return out


def fit_write_fields(centres_db, offsets_db, grid: WriteFieldGrid, *, mode: str = "shift",
                     max_shift_db: float = math.inf, min_gap_db: float = 0.0, active=None) -> FieldFit:
    """Make elements that straddle write-field boundaries fit one field (module docstring: "Write fields").

    Parameters
    ----------
    centres_db : ndarray (N, 2) int64
    offsets_db : ndarray (N, V, 2) int32
    grid : WriteFieldGrid
    mode : {"shift", "shift-or-drop", "drop", "keep"}
        What to do with straddling elements (module docstring); ``"shift"`` keeps an element it cannot shift in
        place, ``"shift-or-drop"`` leaves it out.
    max_shift_db : float
        Largest accepted shift length (database units).
    min_gap_db : float
        Smallest allowed edge-to-edge distance to a neighbour after a shift (the min-gap rule).
    active : ndarray (N,) bool, optional
        Elements to fit and count; the others (a halo from neighbouring tiles) are neighbours only.

    Returns
    -------
    FieldFit
    """
    if mode not in STRADDLE_MODES:
        raise DesignError(f"mode = {mode!r}: not one of {list(STRADDLE_MODES)}")
    c = np.asarray(centres_db, dtype=np.int64)
    o = np.asarray(offsets_db).astype(np.int64)
    n = c.shape[0]
    act = np.ones(n, dtype=bool) if active is None else np.asarray(active, dtype=bool)
    lo_off = o.min(axis=1)
    hi_off = o.max(axis=1)
    lo, hi = c + lo_off, c + hi_off
    shift = np.zeros((n, 2), dtype=np.int64)
    alt = np.zeros((n, 2), dtype=np.int64)
    straddle = np.zeros(n, dtype=bool)
    impossible = np.zeros(n, dtype=bool)
    for ax in (0, 1):  # two axes
        org, size = grid.origin_db[ax], grid.size_db[ax]
        a, b = _span_fields(lo[:, ax], hi[:, ax], org, size)
        s = (b > a) & act
        straddle |= s
        impossible |= s & (b > a + 1)  # wider than a field: no shift clears it
        bnd = org + (a + 1) * size  # the boundary crossed
        down = bnd - hi[:, ax]  # <= 0: move so hi == bnd
        up = bnd - lo[:, ax]  # >= 0: move so lo == bnd
        take_down = np.abs(down) <= np.abs(up)
        shift[:, ax] = np.where(s, np.where(take_down, down, up), 0)
        alt[:, ax] = np.where(s, np.where(take_down, up, down), 0)
    keep = np.ones(n, dtype=bool)
    new_c = c.copy()
    if mode == "keep" or not straddle.any():
        zero = np.zeros((n, 2), dtype=np.int64)
        return FieldFit(c.copy(), keep, zero, straddle, int(straddle.sum()), 0, 0,
                        int(straddle.sum()) if mode == "keep" else 0, 0.0)
    if mode == "drop":
        keep &= ~straddle
        return FieldFit(c.copy(), keep, np.zeros((n, 2), np.int64), straddle, int(straddle.sum()), 0,
                        int(straddle.sum()), 0, 0.0)
    drop_failed = mode == "shift-or-drop"
    moving = straddle & ~impossible
    if drop_failed:
        keep &= ~impossible
    # first try the smaller shift; failures try the other direction; failures again are left out
    trial = np.where(moving[:, None], shift, 0)
    too_far = np.hypot(trial[:, 0], trial[:, 1]) > max_shift_db
    ok = moving & ~too_far
    second = moving & too_far
    new_c[ok] += trial[ok]
    bad = _gap_violations(new_c, o, np.flatnonzero(ok), keep, min_gap_db, c)
    new_c[bad] = c[bad]
    second |= np.isin(np.arange(n), bad)
    # the other direction per axis where it failed (only for the axes that straddle)
    trial2 = np.where(second[:, None], alt, 0)
    far2 = np.hypot(trial2[:, 0], trial2[:, 1]) > max_shift_db
    ok2 = second & ~far2
    new_c[ok2] += trial2[ok2]
    bad2 = _gap_violations(new_c, o, np.flatnonzero(ok2), keep, min_gap_db, c)
    new_c[bad2] = c[bad2]
    failed = impossible | (second & far2) | np.isin(np.arange(n), bad2)
    if drop_failed:
        keep &= ~failed
    new_c[failed] = c[failed]
    applied = new_c - c
    moved = np.any(applied != 0, axis=1)
    lengths = np.hypot(applied[:, 0], applied[:, 1])
    n_failed = int(failed.sum())
    return FieldFit(new_c, keep, applied, straddle, int(straddle.sum()), int((moved & keep).sum()),
                    n_failed if drop_failed else 0, 0 if drop_failed else n_failed, float(lengths.max(initial=0.0)))


def _gap_violations(centres, offsets, moved_idx, keep, min_gap_db, centres_before) -> np.ndarray:
    """Indices among ``moved_idx`` whose polygon comes closer to a kept neighbour than min(min_gap, before)."""
    if moved_idx.size == 0:
        return np.zeros(0, dtype=np.int64)
    from scipy.spatial import cKDTree

    reach = float(np.abs(offsets).max()) * 2.0 * math.sqrt(2.0) + float(min_gap_db) + 1.0
    moved_shift = np.abs(centres[moved_idx] - centres_before[moved_idx]).max()
    tree = cKDTree(centres_before)
    lists = tree.query_ball_point(centres_before[moved_idx], reach + float(moved_shift))
    cnt = np.fromiter((len(x) for x in lists), dtype=np.int64, count=len(lists))
    nb = np.fromiter((j for x in lists for j in x), dtype=np.int64, count=int(cnt.sum()))
    me = np.repeat(moved_idx, cnt)
    sel = (nb != me) & keep[nb]
    me, nb = me[sel], nb[sel]
    if me.size == 0:
        return np.zeros(0, dtype=np.int64)
    uniq = np.unique(np.concatenate([me, nb]))
    pos = np.searchsorted(uniq, np.concatenate([me, nb]))
    now = shapely.polygons((centres[uniq][:, None, :] + offsets[uniq]).astype(np.float64))
    before = shapely.polygons((centres_before[uniq][:, None, :] + offsets[uniq]).astype(np.float64))
    pm, pn = pos[:me.size], pos[me.size:]
    d_now = shapely.distance(now[pm], now[pn])
    d_before = shapely.distance(before[pm], before[pn])
    limit = np.minimum(float(min_gap_db), d_before) - 1e-9
    return np.unique(me[d_now < limit])


def shift_phase_error_rad(shift_db, grad_rad_per_um, *, db_unit_nm: float) -> np.ndarray:
    """First-order phase error of a displaced element: ``|grad phi| * |shift|`` (radians).

    Notes
    -----
    The element keeps its rotation (its geometric phase) but sits at ``r + s``, where the target is
    ``phi(r + s) = phi(r) + grad phi . s + O(s^2)`` (Taylor); ``|grad phi| |s|`` bounds the first-order term.
    """
    s = np.asarray(shift_db, dtype=np.float64)
    return np.asarray(grad_rad_per_um) * np.hypot(s[:, 0], s[:, 1]) * db_unit_nm * 1e-3


def field_cell_name(top: str, ix: int, iy: int) -> str:
    """Name of the GDSII cell holding write field (ix, iy): ``<top>_WF_X<i>_Y<j>`` with ``M`` for minus."""
    def signed(k: int) -> str:
        return f"M{-k}" if k < 0 else f"{k}"

    return f"{top}_WF_X{signed(int(ix))}_Y{signed(int(iy))}"


# ------------------------------------------------------------------------------------------------------------------
# Marks and dose datatypes
# ------------------------------------------------------------------------------------------------------------------

def alignment_marks(kind: str, positions_um, *, size_um: float, line_width_um: float, db_unit_nm: float,
                    layer: int, datatype: int) -> list[Polygon]:
    """Alignment marks as integer polygons, one per position.

    Parameters
    ----------
    kind : {"cross", "square"}
        ``cross``: a plus sign of arm span ``size_um`` and bar width ``line_width_um`` (one 12-vertex polygon);
        ``square``: a filled square of side ``size_um``.
    positions_um : array_like (M, 2)
        Mark centres, micrometres.
    """
    if kind not in MARK_KINDS:
        raise DesignError(f"kind = {kind!r}: not one of {list(MARK_KINDS)}")
    s = 1000.0 / db_unit_nm
    h = int(np.rint(size_um * s / 2))
    if kind == "cross":
        w = max(1, int(np.rint(line_width_um * s / 2)))
        if w >= h:
            raise DesignError("cross bar width must be smaller than its span")
        shape = np.array([[w, -h], [w, -w], [h, -w], [h, w], [w, w], [w, h], [-w, h], [-w, w], [-h, w],
                          [-h, -w], [-w, -w], [-w, -h]], dtype=np.int64)
    else:
        shape = np.array([[-h, -h], [h, -h], [h, h], [-h, h]], dtype=np.int64)
    pos = np.rint(np.asarray(positions_um, dtype=np.float64).reshape(-1, 2) * s).astype(np.int64)
    return [Polygon(layer, datatype, shape + p) for p in pos]  # a handful of marks


def default_mark_positions_um(aperture: Aperture, *, frame_margin_um: float, frame_width_um: float,
                              size_um: float, gap_um: float) -> np.ndarray:
    """Four mark centres at the corners outside the frame: ``±(half extent + margin + frame width + gap + size/2)``."""
    hx, hy = aperture.half_extent_um
    dx = hx + frame_margin_um + frame_width_um + gap_um + size_um / 2
    dy = hy + frame_margin_um + frame_width_um + gap_um + size_um / 2
    return np.array([[-dx, -dy], [dx, -dy], [dx, dy], [-dx, dy]])


def check_marks_clear(marks: Sequence[Polygon], keepout, *, where: str = "<memory>",
                      key: str = "mask.marks.positions_um") -> None:
    """Raise DesignError when a mark overlaps the keep-out region (e.g. aperture plus frame, database units)."""
    if not marks:
        return
    polys = shapely.polygons(np.stack([m.xy_db for m in marks]).astype(np.float64)) \
        if len({len(m.xy_db) for m in marks}) == 1 else np.array([shapely.Polygon(m.xy_db) for m in marks])
    hit = shapely.intersects(polys, keepout)
    if hit.any():
        k = int(np.flatnonzero(hit)[0])
        c = np.asarray(marks[k].xy_db).mean(axis=0)
        raise DesignError(f"{where}: key '{key}': mark {k} (centre near {c.tolist()} database units) overlaps the "
                          "aperture or frame; allowed: marks entirely outside the frame")


def dose_datatype_lut(classes: Sequence[str], dose_datatypes: Mapping[str, int], default_datatype: int, *,
                      where: str = "<memory>", key: str = "mask.dose_datatypes") -> np.ndarray:
    """GDSII datatype per structure class, (C,) int32, for exposure tools that read doses from datatypes.

    Parameters
    ----------
    classes : sequence of str
        Structure classes, e.g. the cell ids in use followed by purposes ("complement", "frame", "label",
        "marks"). Per-site datatypes are then ``lut[class_index]`` (one gather, vectorised).
    dose_datatypes : mapping class -> datatype (0..255)
    default_datatype : int
        For classes not in the mapping.
    """
    unknown = sorted(set(dose_datatypes) - set(classes))
    if unknown:
        raise DesignError(f"{where}: key '{key}.{unknown[0]}': unknown structure class; allowed: {list(classes)}")
    lut = np.full(len(classes), int(default_datatype), dtype=np.int32)
    for k, name in enumerate(classes):  # classes (a short axis)
        if name in dose_datatypes:
            v = dose_datatypes[name]
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or not 0 <= v <= 255:
                raise DesignError(f"{where}: key '{key}.{name}' = {v!r}: expected an integer datatype 0..255")
            lut[k] = int(v)
    return lut


# ------------------------------------------------------------------------------------------------------------------
# Complementary (slot) cells
# ------------------------------------------------------------------------------------------------------------------

def babinet_slot_response(t_antenna_long, t_antenna_short):
    """Slot response from the complementary antenna by Babinet's principle (an estimate; see BABINET_SOURCE).

    Parameters
    ----------
    t_antenna_long, t_antenna_short : complex array_like
        Zeroth-order transmission of the metal antenna (same length and width as the slot) for light polarised
        along / across its long axis.

    Returns
    -------
    (t_slot_long, t_slot_short) : complex ndarrays
        ``t_slot_long = 1 - t_antenna_short`` and ``t_slot_short = 1 - t_antenna_long``.

    Notes
    -----
    Booker's form of Babinet's principle: for an infinitely thin, perfectly conducting screen and its complement,
    with the incident field rotated by 90 degrees for the complement, the transmitted fields add up to the
    incident field, ``t + t_c = 1`` for every diffraction order's zeroth component. The slot's long axis carries
    the magnetic current, so light polarised across the slot plays the role of light along the antenna.
    The converted (geometric-phase) amplitude is unchanged: ``(t_slot_long - t_slot_short)/2 =
    (t_antenna_long - t_antenna_short)/2``. Any time convention gives the same relation.

    References
    ----------
    Booker 1946, J. IEE 93 (IIIA), 620; Falcone et al. 2004, Phys. Rev. Lett. 93, 197401; Zentgraf et al. 2007,
    Phys. Rev. B 76, 033407.
    """
    tl = np.asarray(t_antenna_long, dtype=np.complex128)
    ts = np.asarray(t_antenna_short, dtype=np.complex128)
    return 1.0 - ts, 1.0 - tl


#: Babinet screen criterion (see :func:`babinet_screen_check`).
BABINET_MAX_RE_EPS = -10.0
BABINET_MAX_THICKNESS_FRACTION = 0.1


def babinet_screen_check(antenna: CellLibrary) -> None:
    """Refuse a library whose patterned layer is not a thin, highly conducting screen (Booker's conditions).

    The criterion, at every tabulated wavelength ``lambda`` (all must hold):

    * metal: ``Re(eps) <= -10`` of the patterned material (a good conductor: the surface impedance
      ``Z0 / sqrt(eps)`` is below ~0.3 ``Z0``, so the film reflects like a conductor rather than transmitting
      like a dielectric);
    * thin: thickness ``<= lambda / 10`` (Booker's principle is exact only for an infinitely thin screen; thicker
      films add waveguide resonances in the slots that the antenna does not have);
    * opaque: thickness ``>=`` the field skin depth ``lambda / (2 pi kappa)`` (``kappa = Im n``), so that the
      complementary film blocks light as the principle assumes (a thinner film transmits through the metal).

    Raises
    ------
    LibraryError
        One line naming the library, the failing condition, the value and the limit.

    References
    ----------
    Booker 1946, J. IEE 93 (IIIA), 620 (Babinet's principle for polarised fields and perfectly conducting thin
    screens); Zentgraf et al. 2007, Phys. Rev. B 76, 033407 (its limits for real metal films at optical
    frequencies).
    """
    from metalay.cells.materials import get_material

    where = antenna.source_path or antenna.name
    pat = [lay for lay in antenna.layers if lay.get("patterned")]
    if not pat or not antenna.has_responses:
        raise LibraryError(f"{where}: a Babinet slot estimate needs a patterned layer and responses")
    mat, thick = pat[0]["material"], float(pat[0]["thickness_nm"])
    wl = np.asarray(antenna.wavelengths_nm, float)
    n = get_material(mat).index(wl)
    eps = n**2
    k = int(np.argmax(eps.real))
    head = f"{where}: Babinet's principle needs a thin, highly conducting screen (Booker 1946)"
    if eps.real[k] > BABINET_MAX_RE_EPS:
        raise LibraryError(f"{head}; patterned material {mat!r} has Re(eps) = {eps.real[k]:.3g} at {wl[k]:g} nm, "
                           f"not a metal (need Re(eps) <= {BABINET_MAX_RE_EPS:g})")
    if thick > BABINET_MAX_THICKNESS_FRACTION * wl.min():
        raise LibraryError(f"{head}; the {thick:g} nm layer is not thin (need <= lambda/10 = "
                           f"{BABINET_MAX_THICKNESS_FRACTION * wl.min():.1f} nm at {wl.min():g} nm)")
    skin = wl / (2 * np.pi * n.imag)
    k = int(np.argmax(skin))
    if thick < skin[k]:
        raise LibraryError(f"{head}; the {thick:g} nm {mat} film is thinner than its skin depth {skin[k]:.1f} nm "
                           f"at {wl[k]:g} nm (not opaque)")


def babinet_slot_library(antenna: CellLibrary, *, name: str | None = None) -> CellLibrary:
    """A slot library estimated from a nanofin (antenna) library with responses, labelled as a Babinet estimate.

    Each nanofin cell ``<id>`` becomes a slot cell ``slot-<id>`` of the same length and width. Total powers use
    the lossless-screen form ``P_slot(long) = 1 - P_antenna(short)`` (clipped to [0, 1]).

    Raises
    ------
    LibraryError
        When the library has no responses or no nanofin cells.
    """
    where = antenna.source_path or antenna.name
    if not antenna.has_responses:
        raise LibraryError(f"{where}: a Babinet slot estimate needs antenna responses (library is geometry only)")
    if antenna.mode != "transmission":
        raise LibraryError(f"{where}: a Babinet slot estimate needs a transmission antenna library (a thin screen); "
                           f"this one is {antenna.mode!r} (a mirror behind the antennas has no complement)")
    babinet_screen_check(antenna)
    fins = [k for k, c in enumerate(antenna.cells) if c.kind == "nanofin"]
    if not fins:
        raise LibraryError(f"{where}: a Babinet slot estimate needs nanofin cells; found kinds "
                           f"{sorted({c.kind for c in antenna.cells})}")
    idx = np.asarray(fins)
    tl, ts = babinet_slot_response(antenna.t_long[idx], antenna.t_short[idx])
    pl = ps = None
    if antenna.power_long is not None and antenna.power_short is not None:
        pl = np.clip(1.0 - antenna.power_short[idx], 0.0, 1.0)
        ps = np.clip(1.0 - antenna.power_long[idx], 0.0, 1.0)
    cells = tuple(CellSpec(f"slot-{antenna.cells[k].id}", "slot", antenna.cells[k].layer,
                           tuple((n, antenna.cells[k].dim(n)) for n in ("length_nm", "width_nm"))) for k in fins)
    notes = BABINET_SOURCE
    if antenna.incident_medium != antenna.exit_medium:
        notes += (f"; caution: media differ ({antenna.incident_medium} / {antenna.exit_medium}), outside the "
                  "principle's assumptions")
    prov = dict(antenna.provenance)
    prov.update(responses_source=BABINET_SOURCE, notes=notes,
                geometry_source=f"complement of library {antenna.name!r} cells {[c.id for c in cells]}")
    return check_physical(replace(
        antenna, name=name or f"{antenna.name}-babinet-slots",
        description=f"Slots estimated from {antenna.name} by Babinet's principle (estimate, not solved)",
        cells=cells, t_long=tl, t_short=ts, power_long=pl, power_short=ps, provenance=prov, source_path=None,
        sha256=""))
