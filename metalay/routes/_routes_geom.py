"""Geometry helpers of the fabrication routes: level-set polygons, hole-free GDSII pieces, aperture outlines.

Level sets
    A region ``{g(x, y) > 0}`` of a smooth function ``g`` is contoured on a raster by marching squares (contourpy,
    the contouring engine matplotlib uses), then every vertex is moved onto the exact zero set of ``g`` by a few
    damped Newton steps ``p <- p - g(p) grad g / |grad g|^2`` that evaluate ``g`` at the vertex itself (not on the
    raster). The boundary error is then *measured*: ``|g| / |grad g|`` (the first-order distance to the zero set)
    at every vertex and at the quarter points of every edge.

Hole-free pieces (cut-line scheme)
    GDSII boundaries cannot have holes and have at most 8190 distinct vertices. A polygon with holes is cut by
    the vertical line through an interior point of its first hole (the line crosses the hole, so each side has
    at least one hole fewer; the hole becomes two notches). A hole-free polygon with too many vertices is cut
    in two across the middle of the longer side of its bounding box. Both steps repeat until every piece is
    hole-free and small enough. The pieces tile the original exactly (shapely intersections with half-planes).
"""

from __future__ import annotations

import numpy as np
import shapely

__all__ = ["contour_region", "refine_to_zero", "boundary_distance", "aperture_geometry", "gds_pieces",
           "snap_rings", "count_vertices"]


def _grad(func, x, y, h):
    gx = (func(x + h, y) - func(x - h, y)) / (2 * h)
    gy = (func(x, y + h) - func(x, y - h)) / (2 * h)
    return gx, gy


def refine_to_zero(func, xy: np.ndarray, *, max_step_um: float, frozen: np.ndarray, iterations: int = 4,
                   fd_step_um: float = 1e-6) -> np.ndarray:
    """Move points (V, 2) onto ``func == 0`` by damped Newton steps; ``frozen`` points (V,) bool stay put."""
    xy = np.array(xy, dtype=np.float64)
    move = ~frozen
    for _ in range(iterations):  # a few iterations, vectorised over all vertices
        x, y = xy[move, 0], xy[move, 1]
        g = func(x, y)
        gx, gy = _grad(func, x, y, fd_step_um)
        n2 = gx * gx + gy * gy
        ok = n2 > 0
        sx = np.where(ok, -g * gx / np.where(ok, n2, 1.0), 0.0)
        sy = np.where(ok, -g * gy / np.where(ok, n2, 1.0), 0.0)
        length = np.hypot(sx, sy)
        scale = np.where(length > max_step_um, max_step_um / np.maximum(length, 1e-300), 1.0)
        xy[move, 0] = x + sx * scale
        xy[move, 1] = y + sy * scale
    return xy


def boundary_distance(func, xy: np.ndarray, *, fd_step_um: float = 1e-6) -> np.ndarray:
    """First-order distance ``|g| / |grad g|`` of points (M, 2) to the zero set of ``g`` (um)."""
    x, y = xy[:, 0], xy[:, 1]
    g = func(x, y)
    gx, gy = _grad(func, x, y, fd_step_um)
    n = np.hypot(gx, gy)
    return np.where(n > 0, np.abs(g) / np.where(n > 0, n, 1.0), np.inf)


def contour_region(func, x_um: np.ndarray, y_um: np.ndarray, *, refine: bool = True,
                   exclude_xy: np.ndarray | None = None, exclude_radius_um: float = 0.0):
    """Polygons of ``{func(x, y) > 0}`` over the raster axes, vertices refined onto the exact zero set.

    Parameters
    ----------
    func : callable (x_um, y_um) -> ndarray
        Smooth function, vectorised; its positive set is the region.
    x_um, y_um : ndarray (nx,), (ny,)
        Uniform raster axes (pixel centres); the raster must cover the area of interest.
    refine : bool
        Move vertices onto the zero set (Newton); otherwise keep the marching-squares vertices.
    exclude_xy : ndarray (C, 2), optional
        Singular points (vortex cores) where the boundary error is not measured.
    exclude_radius_um : float or ndarray (C,)
        Radius around each excluded point.

    Returns
    -------
    geometry : shapely geometry (MultiPolygon or Polygon or empty), in micrometres
    error_um : float
        Largest measured distance of the outline (vertices and edge quarter points) to the zero set, outside
        the excluded cores and away from the raster edge.
    """
    import contourpy

    step = float(max(x_um[1] - x_um[0], y_um[1] - y_um[0]))
    z = func(x_um[None, :], y_um[:, None])
    z = np.asarray(z, dtype=np.float64)
    zmax = float(np.nanmax(z)) if z.size else 0.0
    if not zmax > 0:
        return shapely.Polygon(), 0.0
    gen = contourpy.contour_generator(x_um, y_um, z, fill_type="OuterOffset")
    pts_list, off_list = gen.filled(0.0, zmax + 1.0)
    rings, owners = [], []
    for k, (pts, offs) in enumerate(zip(pts_list, off_list)):  # loop over contour polygons (regions, not pixels)
        for a, b in zip(offs[:-1], offs[1:]):
            rings.append(np.asarray(pts[a:b - 1], dtype=np.float64))  # drop the repeated closing point
            owners.append(k)
    if not rings:
        return shapely.Polygon(), 0.0
    sizes = np.array([len(r) for r in rings])
    allxy = np.concatenate(rings)
    x0, x1, y0, y1 = x_um[0], x_um[-1], y_um[0], y_um[-1]
    tol = 1e-9 * step
    on_edge = ((np.abs(allxy[:, 0] - x0) < tol) | (np.abs(allxy[:, 0] - x1) < tol)
               | (np.abs(allxy[:, 1] - y0) < tol) | (np.abs(allxy[:, 1] - y1) < tol))
    if refine:
        allxy = refine_to_zero(func, allxy, max_step_um=0.5 * step, frozen=on_edge)
    parts = np.split(allxy, np.cumsum(sizes)[:-1])
    polys = []
    k = 0
    while k < len(parts):  # assemble shells + holes per contour polygon
        owner = owners[k]
        shell = parts[k]
        holes = []
        k += 1
        while k < len(parts) and owners[k] == owner:
            holes.append(parts[k])
            k += 1
        if len(shell) >= 3:
            polys.append(shapely.Polygon(shell, [h for h in holes if len(h) >= 3]))
    geom = shapely.union_all([shapely.make_valid(p) if not p.is_valid else p for p in polys])
    geom = _polygonal(geom)
    # measured boundary error: vertices and edge quarter points, away from the raster edge and the cores
    nxt = np.concatenate([np.roll(p, -1, axis=0) for p in parts])
    probe = np.concatenate([allxy] + [allxy + t * (nxt - allxy) for t in (0.25, 0.5, 0.75)])
    split_at = np.cumsum(sizes)[:-1]
    next_on_edge = np.concatenate([np.roll(e, -1) for e in np.split(on_edge, split_at)])
    edge_probe = on_edge | next_on_edge
    skip = np.concatenate([on_edge] + [edge_probe] * 3)
    if exclude_xy is not None and len(exclude_xy):
        radii = np.broadcast_to(np.asarray(exclude_radius_um, dtype=np.float64), (len(exclude_xy),))
        for (cx, cy), rad in zip(np.asarray(exclude_xy, dtype=np.float64), radii):  # a few singular points
            skip |= np.hypot(probe[:, 0] - cx, probe[:, 1] - cy) < rad
    probe = probe[~skip]
    err = float(np.max(boundary_distance(func, probe))) if probe.size else 0.0
    return geom, err


def _polygonal(geom):
    """Keep only the polygonal part of a geometry (drop stray lines/points from make_valid or intersections)."""
    if geom.is_empty:
        return shapely.Polygon()
    if geom.geom_type in ("Polygon", "MultiPolygon"):
        return geom
    polys = []
    for p in shapely.get_parts(geom):  # parts of a collection (regions)
        if p.geom_type == "Polygon" and p.area > 0:
            polys.append(p)
        elif p.geom_type == "MultiPolygon":
            polys.extend(q for q in p.geoms if q.area > 0)
    if not polys:
        return shapely.Polygon()
    return shapely.MultiPolygon(polys)


def aperture_geometry(aperture, *, tolerance_um: float):
    """The aperture as a shapely polygon (um) with circles approximated within ``tolerance_um`` (sagitta).

    Returns
    -------
    geometry, sagitta_um : shapely Polygon, float
        The outline and the largest distance between the true circle and its inscribed polygon.
    """
    def circle(r):
        tol = max(tolerance_um, 1e-9)
        n = int(np.ceil(np.pi / np.arccos(max(1.0 - tol / r, -1.0)))) if r > tol else 8
        n = max(64, 4 * int(np.ceil(n / 4)))
        ang = 2 * np.pi * np.arange(n) / n
        return shapely.Polygon(np.stack([r * np.cos(ang), r * np.sin(ang)], axis=1)), r * (1 - np.cos(np.pi / n))

    if aperture.shape == "circle":
        return circle(aperture.diameter_um / 2)
    if aperture.shape == "annulus":
        outer, e1 = circle(aperture.diameter_um / 2)
        inner, e2 = circle(aperture.inner_diameter_um / 2)
        return outer.difference(inner), max(e1, e2)
    hx, hy = aperture.half_extent_um
    return shapely.box(-hx, -hy, hx, hy), 0.0


def count_vertices(poly) -> int:
    return len(poly.exterior.coords) - 1


def gds_pieces(geom, *, max_vertices: int) -> list:
    """Split a polygonal geometry into hole-free polygons of at most ``max_vertices`` vertices (cut-line scheme).

    Returns a list of shapely Polygons without interiors, in a deterministic order.
    """
    stack = [p for p in shapely.get_parts(geom) if p.geom_type == "Polygon" and not p.is_empty]
    out = []
    guard = 0
    while stack:  # loop over pieces (regions), not pixels
        guard += 1
        if guard > 1_000_000:  # pragma: no cover - cannot happen for valid input; never hang
            raise RuntimeError("gds_pieces: cut-line splitting did not terminate")
        p = stack.pop()
        minx, miny, maxx, maxy = p.bounds
        if len(p.interiors):
            cut_x = shapely.Polygon(p.interiors[0]).representative_point().x
            halves = (shapely.box(minx - 1, miny - 1, cut_x, maxy + 1), shapely.box(cut_x, miny - 1, maxx + 1,
                                                                                       maxy + 1))
        elif count_vertices(p) > max_vertices:
            if maxx - minx >= maxy - miny:
                c = 0.5 * (minx + maxx)
                halves = (shapely.box(minx - 1, miny - 1, c, maxy + 1), shapely.box(c, miny - 1, maxx + 1, maxy + 1))
            else:
                c = 0.5 * (miny + maxy)
                halves = (shapely.box(minx - 1, miny - 1, maxx + 1, c), shapely.box(minx - 1, c, maxx + 1, maxy + 1))
        else:
            out.append(p)
            continue
        for h in halves:
            part = _polygonal(p.intersection(h))
            stack.extend(q for q in shapely.get_parts(part) if q.geom_type == "Polygon" and q.area > 0)
    return out


def snap_rings(polys: list, db_unit_nm: float) -> list[np.ndarray]:
    """Exterior rings of hole-free polygons as (V, 2) int64 database-unit arrays (repeated vertices removed,
    polygons with fewer than 3 distinct vertices dropped)."""
    scale = 1000.0 / db_unit_nm
    out = []
    for p in polys:  # loop over polygons (regions)
        xy = np.asarray(p.exterior.coords, dtype=np.float64)[:-1]
        q = np.rint(xy * scale).astype(np.int64)
        keep = np.any(q != np.roll(q, 1, axis=0), axis=1)
        q = q[keep]
        if len(q) >= 3 and len(np.unique(q, axis=0)) >= 3:
            out.append(q)
    return out
