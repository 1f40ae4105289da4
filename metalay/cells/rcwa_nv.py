"""Polygon layers for the RCWA solver: exact Fourier coefficients and the normal-vector factorisation.

A :class:`PolygonPattern` describes one patterned layer as a list of non-overlapping polygons (vertices in nm,
any orientation, any edge direction) with a permittivity each, on a uniform background. Its Fourier coefficients
are computed in closed form (no pixels), and the permittivity operators use the normal-vector method, which is
valid for edges of any direction (Li's inverse rule along x and y is exact only for axis-parallel edges).

The solver (:func:`metalay.cells.rcwa.solve`) dispatches here for polygon layers; :func:`solve_polygon_cell` is the
public entry for one patterned layer given as polygons (a rotated cell, or a supercell of several rotated
elements).

Notes
-----
Fourier coefficient of the indicator of a polygon P at wavevector q != 0 (divergence theorem with
``F = i q exp(-i q.r) / |q|^2``)::

    F(q) = (i / |q|^2) sum_edges (q_x d_y - q_y d_x) exp(-i q.m) sinc(q.d / 2)

with ``d`` the edge vector, ``m`` its midpoint (counter-clockwise polygon) and ``sinc(u) = sin u / u``;
``F(0)`` is the area. The cell coefficient is ``F(G_mn) / (period_x period_y)``.

Normal-vector method (Schuster et al. 2007; Goetz et al. 2008): with a unit field ``n(x, y)`` normal to every
edge, ``D = eps_op E`` with ``eps_op = [[eps]] - Delta N`` for the in-plane components, where
``Delta = [[eps]] - [[1/eps]]^-1`` and ``N = [[n n^T]]`` (Toeplitz matrices of the field's products): Laurent's
rule for the tangential component, the inverse rule for the normal one. The product ``Delta N`` is written in
its Hermitian-symmetric form ``(Delta N + N Delta)/2`` so that a lossless cell conserves energy at every
truncation (both forms converge to the same limit). The field is built from the geometry: at each point of a
fine grid, the normals of all edges (and their periodic images) are averaged as tensors ``n n^T`` with weights
``1/d^4`` (``d`` the distance to the edge); the principal direction of that tensor is ``n``. On an edge the
field is exactly that edge's normal; between edges it turns smoothly.

References
----------
Schuster, Ruoff, Kerwien, Rafler, Osten 2007, J. Opt. Soc. Am. A 24, 2880 (normal vector method).
Goetz, Schuster, Frenner, Rafler, Osten 2008, Opt. Express 16, 17295 (automatic normal-vector fields).
Li 1996, J. Opt. Soc. Am. A 13, 1870 (Fourier factorisation rules).
Popov and Neviere 2001, J. Opt. Soc. Am. A 18, 2886 (fast Fourier factorisation, normal-vector formulation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from metalay.errors import MetalayError

_WPOW = 2.0

__all__ = ["PolygonPattern", "polygon_pattern", "rotated_rect_pattern", "polygon_fourier", "normal_field",
           "nv_eps_matrices", "axis_parallel", "to_blocks", "solve_polygon_cell"]


@dataclass(frozen=True)
class PolygonPattern:
    """One patterned layer made of polygons on a background, batched over B (wavelengths and/or materials).

    Attributes
    ----------
    polygons_nm : tuple of ndarray
        K polygons, each ``(V_k, 2)`` vertices in nm (x, y), shared by the whole batch. Polygons must not
        overlap each other or their periodic images; they may cross the cell border (the layer is periodic).
    eps : ndarray (B, K) complex
        Relative permittivity of each polygon.
    eps_background : ndarray (B,) complex
        Permittivity around the polygons.
    period_x_nm, period_y_nm : float
        Cell size (must equal the stack's periods).
    """

    polygons_nm: tuple
    eps: np.ndarray
    eps_background: np.ndarray
    period_x_nm: float
    period_y_nm: float

    @property
    def batch(self) -> int:
        return self.eps.shape[0]

    def sliced(self, sl) -> "PolygonPattern":
        """The same geometry for batch items ``sl``."""
        if self.batch == 1:
            return self
        return PolygonPattern(self.polygons_nm, self.eps[sl], self.eps_background[sl], self.period_x_nm,
                              self.period_y_nm)

    def expanded(self, b: int) -> "PolygonPattern":
        if self.batch == b:
            return self
        return PolygonPattern(self.polygons_nm, np.broadcast_to(self.eps, (b, self.eps.shape[1])),
                              np.broadcast_to(self.eps_background, (b,)), self.period_x_nm, self.period_y_nm)


def _ccw(poly: np.ndarray) -> np.ndarray:
    x, y = poly[:, 0], poly[:, 1]
    area2 = np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)
    return poly if area2 > 0 else poly[::-1].copy()


def polygon_pattern(polygons_nm, eps_polygons, eps_background, period_x_nm: float, period_y_nm: float,
                    *, check: bool = True) -> PolygonPattern:
    """Validate and build a :class:`PolygonPattern`.

    Parameters
    ----------
    polygons_nm : sequence of array_like (V_k, 2)
        Vertices in nm; each polygon simple (not self-intersecting), at least 3 vertices.
    eps_polygons : array_like, (K,) or (B, K) complex
        Permittivity per polygon (a scalar applies to all).
    eps_background : array_like, () or (B,) complex
    period_x_nm, period_y_nm : float
    check : bool
        Check simplicity and non-overlap (with periodic images) with shapely.

    Raises
    ------
    MetalayError
        One line naming the polygon and the problem.
    """
    polys = []
    for k, p in enumerate(polygons_nm):
        arr = np.asarray(p, dtype=float)
        if arr.ndim != 2 or arr.shape[1] != 2 or arr.shape[0] < 3 or not np.all(np.isfinite(arr)):
            raise MetalayError(f"polygon {k}: need an array of at least 3 finite (x, y) vertices in nm")
        if np.allclose(arr[0], arr[-1]):
            arr = arr[:-1]
        polys.append(_ccw(arr))
    if not polys:
        raise MetalayError("polygon pattern: need at least one polygon")
    k = len(polys)
    eps = np.asarray(eps_polygons, dtype=complex)
    eps = np.broadcast_to(eps, (k,))[None, :] if eps.ndim <= 1 else eps
    if eps.shape[-1] != k:
        raise MetalayError(f"polygon pattern: {eps.shape[-1]} permittivities for {k} polygons")
    bg = np.atleast_1d(np.asarray(eps_background, dtype=complex))
    b = max(eps.shape[0], bg.shape[0])
    eps = np.broadcast_to(eps, (b, k)).copy()
    bg = np.broadcast_to(bg, (b,)).copy()
    if check:
        _check_polygons(polys, float(period_x_nm), float(period_y_nm))
    return PolygonPattern(tuple(polys), eps, bg, float(period_x_nm), float(period_y_nm))


def _check_polygons(polys, px, py):
    import shapely

    shapes = [shapely.Polygon(p) for p in polys]
    for k, s in enumerate(shapes):
        if not s.is_valid or s.area <= 0:
            raise MetalayError(f"polygon {k}: not a simple polygon of positive area ({shapely.is_valid_reason(s)})")
    images = [shapely.affinity.translate(s, i * px, j * py) for s in shapes for i in (-1, 0, 1) for j in (-1, 0, 1)]
    owner = [k for k in range(len(shapes)) for _ in range(9)]
    tree = shapely.STRtree(images)
    for k, s in enumerate(shapes):
        for idx in tree.query(s, predicate="intersects"):
            if (owner[idx] != k or idx % 9 != 4) and s.intersection(images[idx]).area > 1e-6 * s.area:
                raise MetalayError(f"polygon {k} overlaps polygon {owner[idx]} (or a periodic image of it); "
                                   "polygons of one layer must not overlap")


def rotated_rect_pattern(length_nm: float, width_nm: float, angle_deg: float, eps_inside, eps_outside,
                         period_x_nm: float, period_y_nm: float) -> PolygonPattern:
    """A centred ``length_nm`` x ``width_nm`` rectangle rotated counter-clockwise by ``angle_deg`` (long axis
    along +x at 0)."""
    hl, hw = length_nm / 2, width_nm / 2
    a = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    pts = np.array([[hl, hw], [-hl, hw], [-hl, -hw], [hl, -hw]]) @ rot.T
    return polygon_pattern([pts], np.atleast_1d(np.asarray(eps_inside, complex))[:, None], eps_outside,
                           period_x_nm, period_y_nm)


# ----------------------------------------------------------------------------------------------------------------
# Exact Fourier coefficients


def polygon_fourier(poly_nm: np.ndarray, px: float, py: float, ox: np.ndarray, oy: np.ndarray) -> np.ndarray:
    """Fourier coefficients ``(Px, Py)`` of the periodic indicator of a counter-clockwise polygon.

    ``c(m, n) = (1 / (px py)) integral_P exp(-i (G_m x + G_n y)) dx dy`` with ``G_m = 2 pi m / px``;
    closed form over the edges (module Notes).
    """
    a = poly_nm
    bvert = np.roll(a, -1, axis=0)
    d = bvert - a                                             # (E, 2)
    mid = 0.5 * (a + bvert)
    qx = (2 * np.pi * ox / px)[:, None, None]                 # (Px, 1, 1)
    qy = (2 * np.pi * oy / py)[None, :, None]                 # (1, Py, 1)
    cross = qx * d[None, None, :, 1] - qy * d[None, None, :, 0]
    qd = 0.5 * (qx * d[None, None, :, 0] + qy * d[None, None, :, 1])
    phase = np.exp(-1j * (qx * mid[None, None, :, 0] + qy * mid[None, None, :, 1]))
    s = np.sum(cross * phase * np.sinc(qd / np.pi), axis=-1)  # (Px, Py)
    q2 = qx[..., 0] ** 2 + qy[..., 0] ** 2
    zero = q2 == 0
    area = 0.5 * np.sum(a[:, 0] * bvert[:, 1] - bvert[:, 0] * a[:, 1])
    out = np.where(zero, area + 0j, 1j * s / np.where(zero, 1.0, q2))
    return out / (px * py)


def _coefficients(pat: PolygonPattern, ox, oy, inverse: bool) -> np.ndarray:
    """(B, Px, Py) coefficients of eps (or 1/eps): background + sum_k (eps_k - eps_bg) indicator_k."""
    eps, bg = (1.0 / pat.eps, 1.0 / pat.eps_background) if inverse else (pat.eps, pat.eps_background)
    ind = np.stack([polygon_fourier(p, pat.period_x_nm, pat.period_y_nm, ox, oy) for p in pat.polygons_nm])
    c = np.einsum("bk,kpq->bpq", eps - bg[:, None], ind)
    i0, j0 = np.flatnonzero(ox == 0)[0], np.flatnonzero(oy == 0)[0]
    c[:, i0, j0] += bg
    return c


# ----------------------------------------------------------------------------------------------------------------
# Normal-vector field


def normal_field(polygons_nm, px: float, py: float, nx_grid: int, ny_grid: int):
    """Unit normal field sampled at cell-centred grid points: ``(nxx, nxy, nyy)`` each ``(nx_grid, ny_grid)``.

    Tensor average of the edge normals with weights ``1 / d^4`` over the edges and their 8 nearest periodic
    images; ``n`` is the principal direction (module Notes).
    """
    x = -px / 2 + (np.arange(nx_grid) + 0.5) * px / nx_grid
    y = -py / 2 + (np.arange(ny_grid) + 0.5) * py / ny_grid
    gx, gy = np.meshgrid(x, y, indexing="ij")
    r = np.stack([gx.ravel(), gy.ravel()], axis=1)            # (G, 2)
    a = np.concatenate([p for p in polygons_nm])
    bb = np.concatenate([np.roll(p, -1, axis=0) for p in polygons_nm])
    shifts = np.array([(i * px, j * py) for i in (-1, 0, 1) for j in (-1, 0, 1)])
    a = (a[None, :, :] + shifts[:, None, :]).reshape(-1, 2)
    bb = (bb[None, :, :] + shifts[:, None, :]).reshape(-1, 2)
    d = bb - a
    length2 = np.sum(d * d, axis=1)
    nrm = np.stack([d[:, 1], -d[:, 0]], axis=1) / np.sqrt(length2)[:, None]
    txx = np.zeros(r.shape[0])
    txy = np.zeros(r.shape[0])
    tyy = np.zeros(r.shape[0])
    wsum = np.zeros(r.shape[0])
    scale2 = (1e-3 * min(px, py)) ** 2
    for k in range(a.shape[0]):       # loop over edges (short axis); vectorised over grid points
        t = np.clip(((r - a[k]) @ d[k]) / length2[k], 0.0, 1.0)
        dist2 = np.sum((r - (a[k] + t[:, None] * d[k])) ** 2, axis=1)
        w = 1.0 / (dist2 + scale2) ** _WPOW
        txx += w * nrm[k, 0] ** 2
        txy += w * nrm[k, 0] * nrm[k, 1]
        tyy += w * nrm[k, 1] ** 2
        wsum += w
    phi = 0.5 * np.arctan2(2 * txy, txx - tyy)
    c, s = np.cos(phi), np.sin(phi)
    shape = (nx_grid, ny_grid)
    return (c * c).reshape(shape), (c * s).reshape(shape), (s * s).reshape(shape)


def _sampled_coefficients(f: np.ndarray, px, py, ox, oy) -> np.ndarray:
    """Fourier coefficients (Px, Py) of a field sampled at cell-centred points (direct DFT by matrices)."""
    ng_x, ng_y = f.shape
    x = -px / 2 + (np.arange(ng_x) + 0.5) * px / ng_x
    y = -py / 2 + (np.arange(ng_y) + 0.5) * py / ng_y
    ex = np.exp(-2j * np.pi * np.outer(ox, x) / px) / ng_x
    ey = np.exp(-2j * np.pi * np.outer(oy, y) / py) / ng_y
    return ex @ f @ ey.T


def _toeplitz2(c: np.ndarray, mx: int, my: int) -> np.ndarray:
    """(B, N, N) block-Toeplitz matrices from coefficients (B, 4mx+1, 4my+1); harmonics m outer, n inner."""
    b = c.shape[0]
    nx, ny = 2 * mx + 1, 2 * my + 1
    ia, ja = np.arange(nx), np.arange(ny)
    dm = (ia[:, None, None, None] - ia[None, None, :, None]) + 2 * mx
    dn = (ja[None, :, None, None] - ja[None, None, None, :]) + 2 * my
    return c[:, dm, dn].reshape(b, nx * ny, nx * ny)


def nv_eps_matrices(pat: PolygonPattern, mx: int, my: int, factorization: str = "nv", *, grid: int | None = None):
    """Permittivity operators of a polygon layer: ``(E_zz_laurent, E_xx, E_xy, E_yx, E_yy)``, each (B, N, N).

    Parameters
    ----------
    pat : PolygonPattern
    mx, my : int
        Truncation (orders ``-mx..mx``, ``-my..my``).
    factorization : {"nv", "laurent"}
        Normal-vector method, or Laurent's rule for every component (basic formulation).
    grid : int, optional
        Samples per axis of the normal field (default ``max(128, 8 (2m+1))`` rounded up to a multiple of 32).
    """
    ox = np.arange(-2 * mx, 2 * mx + 1)
    oy = np.arange(-2 * my, 2 * my + 1)
    c_eps = _coefficients(pat, ox, oy, inverse=False)
    e_l = _toeplitz2(c_eps, mx, my)
    if factorization == "laurent":
        return e_l, e_l, None, None, e_l
    c_inv = _coefficients(pat, ox, oy, inverse=True)
    delta = e_l - np.linalg.inv(_toeplitz2(c_inv, mx, my))
    gx = grid or int(32 * np.ceil(max(128, 8 * (2 * mx + 1)) / 32))
    gy = grid or int(32 * np.ceil(max(128, 8 * (2 * my + 1)) / 32))
    fields = normal_field(pat.polygons_nm, pat.period_x_nm, pat.period_y_nm, gx, gy)
    nxx, nxy, nyy = (_toeplitz2(_sampled_coefficients(f, pat.period_x_nm, pat.period_y_nm, ox, oy)[None],
                                mx, my) for f in fields)

    def sym(nm):
        return 0.5 * (delta @ nm + nm @ delta)

    e_xy = -sym(nxy)
    return e_l, e_l - sym(nxx), e_xy, e_xy, e_l - sym(nyy)


# ----------------------------------------------------------------------------------------------------------------
# Axis-parallel polygons -> rectilinear blocks (Li's rules apply there)


def axis_parallel(pat: PolygonPattern, *, tol_nm: float = 1e-9) -> bool:
    """True when every edge of every polygon is parallel to x or y."""
    for p in pat.polygons_nm:
        d = np.roll(p, -1, axis=0) - p
        if np.any((np.abs(d[:, 0]) > tol_nm) & (np.abs(d[:, 1]) > tol_nm)):
            return False
    return True


def to_blocks(pat: PolygonPattern):
    """A rectilinear :class:`metalay.cells.rcwa.Pattern` equal to an axis-parallel polygon pattern (exact).

    Block edges are the distinct vertex coordinates (folded into the cell); each block takes the permittivity of
    the polygon containing its centre (or its periodic image), else the background.
    """
    import shapely

    from metalay.cells.rcwa import Pattern

    px, py = pat.period_x_nm, pat.period_y_nm
    fold = lambda v, p: (v + p / 2) % p - p / 2  # noqa: E731
    xs = np.unique(np.concatenate([[-px / 2, px / 2], *[fold(p[:, 0], px) for p in pat.polygons_nm]]))
    ys = np.unique(np.concatenate([[-py / 2, py / 2], *[fold(p[:, 1], py) for p in pat.polygons_nm]]))
    xs = xs[(xs >= -px / 2) & (xs <= px / 2)]
    ys = ys[(ys >= -py / 2) & (ys <= py / 2)]
    xc, yc = 0.5 * (xs[1:] + xs[:-1]), 0.5 * (ys[1:] + ys[:-1])
    gx, gy = np.meshgrid(xc, yc, indexing="ij")
    owner = np.full(gx.shape, -1)
    for k, p in enumerate(pat.polygons_nm):
        poly = shapely.Polygon(p)
        for i in (-1, 0, 1):
            for j in (-1, 0, 1):
                inside = shapely.contains_xy(poly, gx + i * px, gy + j * py)
                owner[inside] = k
    b = pat.batch
    eps = np.where(owner[None] >= 0, pat.eps[:, np.clip(owner, 0, None)], pat.eps_background[:, None, None])
    return Pattern(np.broadcast_to(xs, (b, xs.size)).copy(), np.broadcast_to(ys, (b, ys.size)).copy(), eps)


# ----------------------------------------------------------------------------------------------------------------
# Public entry for a polygon layer


def solve_polygon_cell(polygons_nm, eps_polygons, eps_background, thickness_nm: float, wavelength_nm, *,
                       period_x_nm: float, period_y_nm: float, eps_superstrate, eps_substrate,
                       layers_before=(), layers_after=(), harmonics="auto", factorization: str = "auto",
                       theta_deg: float = 0.0, phi_deg: float = 0.0, tolerance_abs_t: float = 2e-3,
                       tolerance_phase_deg: float = 0.5, max_harmonics: int = 40):
    """Solve a stack with one patterned layer given as polygons (a rotated cell, or a supercell of elements).

    Parameters
    ----------
    polygons_nm : sequence of (V_k, 2) array_like
        Polygons in nm in the cell ``[-period_x/2, period_x/2] x [-period_y/2, period_y/2]`` (periodic).
    eps_polygons : array_like (K,) or (B, K) complex
        Permittivity of each polygon (batch over B, e.g. wavelengths).
    eps_background : complex or (B,)
    thickness_nm : float
        Thickness of the patterned layer.
    wavelength_nm : float or (B,)
    period_x_nm, period_y_nm : float
    eps_superstrate, eps_substrate : complex or (B,)
        Incident half-space (lossless) and exit half-space.
    layers_before, layers_after : sequence of metalay.cells.rcwa.Layer
        Further layers between the superstrate and the pattern, and between the pattern and the substrate.
    harmonics : (int, int) or "auto"
        Truncation, or "auto": raised until the zeroth-order Jones matrices change by less than the tolerances
        (:func:`metalay.cells.rcwa.solve`).
    factorization : {"auto", "nv", "li", "laurent"}
        "auto": Li's rules when every edge is axis-parallel, otherwise the normal-vector method.
    theta_deg, phi_deg : float
        Angle of incidence and azimuth.
    tolerance_abs_t, tolerance_phase_deg, max_harmonics
        Convergence target for ``harmonics="auto"``.

    Returns
    -------
    metalay.cells.rcwa.RcwaResult
        Jones matrices of the zeroth order, power per diffraction order (``orders_t``, ``orders_r``; harmonics
        flattened with m outer, n inner; ``settings["orders"]`` lists them) and the rule used per layer.

    Examples
    --------
    A geometric-phase supercell of 8 fins rotated in steps of 22.5 degrees, 325 nm apart along x::

        fins = [rotated_outline(i) for i in range(8)]   # (4, 2) arrays centred at x_i = (i - 3.5) * 325
        res = solve_polygon_cell(fins, 2.45**2, 1.0, 600.0, 532.0, period_x_nm=2600.0, period_y_nm=325.0,
                                 eps_superstrate=1.46**2, eps_substrate=1.0, harmonics=(24, 3))
    """
    from metalay.cells.rcwa import Layer, Stack, solve

    pat = polygon_pattern(polygons_nm, eps_polygons, eps_background, period_x_nm, period_y_nm)
    layers = (*layers_before, Layer(thickness_nm, pat), *layers_after)
    st = Stack(np.atleast_1d(np.asarray(eps_superstrate, complex)), tuple(layers),
               np.atleast_1d(np.asarray(eps_substrate, complex)), float(period_x_nm), float(period_y_nm))
    return solve(st, wavelength_nm, harmonics=harmonics, factorization=factorization, theta_deg=theta_deg,
                 phi_deg=phi_deg, tolerance_abs_t=tolerance_abs_t, tolerance_phase_deg=tolerance_phase_deg,
                 max_harmonics=max_harmonics)
