"""Rigorous coupled-wave analysis (Fourier modal method) for 2D-periodic layer stacks.

A stack is a superstrate (incident medium, z < 0), a list of layers from the incident side to the exit side
(each uniform or patterned with a rectilinear map of permittivity), and a substrate (exit medium). The solver
returns the zeroth-order Jones matrices in transmission and reflection, normalised so that ``|J|^2`` is a power
ratio, and the total power carried by all diffracted orders on each side.

Everything is vectorised over a leading batch axis (geometries and/or wavelengths): matrices are ``(B, n, n)``
and the only Python loop is over layers.

Conventions
-----------
Time dependence ``exp(-i omega t)``; a plane wave travelling to +z is ``exp(+i k z)``; absorbing media have
``Im(eps) > 0``. Polarisation basis of the zeroth order: ``s = (-sin phi, cos phi, 0)``, ``p = s x k_hat`` for
incident and transmitted waves; for reflected waves ``p`` is chosen with the same tangential direction as the
incident ``p`` so that at normal incidence (``phi = 0``) the basis is simply (x, y) on both sides: index 0 = p
(= x at normal incidence), index 1 = s (= y). ``J[..., out, in]``.

Method
------
Fourier expansion of the fields over harmonics ``(m, n)``, ``|m| <= Mx``, ``|n| <= My`` (rectangular truncation),
chosen by default from a convergence target (``harmonics="auto"``, see :func:`solve`).
The permittivity rule is chosen per layer (``factorization="auto"``) and recorded in the result: for a layer whose
edges are all axis-parallel, Li's factorisation rules for crossed gratings made of rectangular blocks (Li 1997):
``D_x = [[ [1/eps]_x^-1 ]]_y E_x`` (inverse rule along x, where E_x is normal to the block edges, then Laurent's rule
along y), ``D_y`` likewise with x and y swapped, and ``E_z = [[eps]]^-1 D_z``; for a polygon layer with oblique
edges (:class:`metalay.cells.rcwa_nv.PolygonPattern`), the normal-vector method (Schuster et al. 2007), whose in-plane
operator has off-diagonal blocks. Curved outlines (ellipses) given as blocks are staircased.
``factorization="laurent"`` uses Laurent's rule everywhere (the basic formulation, which converges slowly for high
contrast; kept for comparison). Layers are combined with scattering
matrices referenced to a gap medium and Redheffer star products (Rumpf 2011), which are unconditionally stable
(evanescent modes only appear as ``exp(i q d)`` with ``Im q >= 0``).

References
----------
Moharam, Grann, Pommet, Gaylord 1995, J. Opt. Soc. Am. A 12, 1068 (formulation of RCWA).
Li 1996, J. Opt. Soc. Am. A 13, 1870 (Fourier factorisation rules).
Li 1997, J. Opt. Soc. Am. A 14, 2758 (new formulation of the Fourier modal method for crossed gratings).
Schuster, Ruoff, Kerwien, Rafler, Osten 2007, J. Opt. Soc. Am. A 24, 2880 (normal vector method).
Rumpf 2011, Progress In Electromagnetics Research B 35, 241 (improved scattering matrices).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from metalay.errors import MetalayError

__all__ = [
    "Pattern",
    "Layer",
    "Stack",
    "RcwaResult",
    "uniform_pattern",
    "rect_pattern",
    "ellipse_pattern",
    "solve",
    "jones_circular",
    "order_powers",
    "FACTORIZATIONS",
    "DEFAULT_TOLERANCE_ABS_T",
    "DEFAULT_TOLERANCE_PHASE_DEG",
]


# ----------------------------------------------------------------------------------------------------------------
# Geometry: rectilinear permittivity maps


@dataclass(frozen=True)
class Pattern:
    """Permittivity of one patterned layer on a rectilinear grid of blocks, batched.

    Attributes
    ----------
    x_edges_nm : ndarray, (B, I+1) float
        Block edges along x, increasing, from ``-period_x_nm/2`` to ``+period_x_nm/2``.
    y_edges_nm : ndarray, (B, J+1) float
        Block edges along y, likewise.
    eps : ndarray, (B, I, J) complex
        Relative permittivity of each block (``Im >= 0`` for absorbing media).
    """

    x_edges_nm: np.ndarray
    y_edges_nm: np.ndarray
    eps: np.ndarray

    @property
    def batch(self) -> int:
        return self.eps.shape[0]


@dataclass(frozen=True)
class Layer:
    """One layer of a stack: a thickness and either a uniform permittivity (B,) or a :class:`Pattern`."""

    thickness_nm: float | np.ndarray
    eps: np.ndarray | Pattern


@dataclass(frozen=True)
class Stack:
    """A 2D-periodic stack: superstrate (incident side) / layers / substrate (exit side).

    Attributes
    ----------
    eps_superstrate, eps_substrate : ndarray (B,) complex
        Permittivities of the half-spaces (the superstrate must be lossless).
    layers : tuple of Layer
        From the incident side to the exit side.
    period_x_nm, period_y_nm : float
        Rectangular lattice periods.
    """

    eps_superstrate: np.ndarray
    layers: tuple
    eps_substrate: np.ndarray
    period_x_nm: float
    period_y_nm: float


@dataclass(frozen=True)
class RcwaResult:
    """Zeroth-order Jones matrices and total powers (all arrays batched over B).

    Attributes
    ----------
    t_jones, r_jones : ndarray (B, 2, 2) complex
        ``J[b, out, in]`` in the (p, s) basis, ``|J|^2`` = zeroth-order power / incident power.
    power_t, power_r : ndarray (B, 2) float
        Total power leaving on the transmission / reflection side (all propagating orders), per input (p, s).
    orders_t, orders_r : ndarray (B, 2, N) float
        Power per diffraction order (harmonics flattened with m outer, n inner), per input polarisation.
    harmonics : tuple (Mx, My)
    settings : dict
        Solver settings (for provenance).
    order_fields : dict or None
        Per-order tangential fields for :func:`order_powers` (any input polarisation by superposition):
        ``"t"``/``"r"`` (B, 2N, 2) complex ``[E_x (N); E_y (N)]`` per input (p, s), ``"kx"``, ``"ky"`` (B, N),
        ``"kz_t"``, ``"kz_r"`` (B, N), ``"flux_in"`` (B, 2), ``"m"``, ``"n"`` (N,) order indices.
    """

    t_jones: np.ndarray
    r_jones: np.ndarray
    power_t: np.ndarray
    power_r: np.ndarray
    orders_t: np.ndarray
    orders_r: np.ndarray
    harmonics: tuple
    settings: dict = field(default_factory=dict)
    order_fields: dict | None = None


def _as_batch(a, batch: int, dtype=complex) -> np.ndarray:
    arr = np.asarray(a, dtype=dtype)
    return np.broadcast_to(arr.reshape(-1) if arr.ndim else arr, (batch,)).copy()


def uniform_pattern(eps, period_x_nm: float, period_y_nm: float) -> Pattern:
    """A uniform layer written as a one-block :class:`Pattern` (useful to test the patterned code path)."""
    eps = np.atleast_1d(np.asarray(eps, dtype=complex))
    b = eps.shape[0]
    xe = np.broadcast_to(np.array([-period_x_nm / 2, period_x_nm / 2]), (b, 2)).copy()
    ye = np.broadcast_to(np.array([-period_y_nm / 2, period_y_nm / 2]), (b, 2)).copy()
    return Pattern(xe, ye, eps.reshape(b, 1, 1))


def rect_pattern(length_nm, width_nm, eps_inside, eps_outside, period_x_nm: float, period_y_nm: float) -> Pattern:
    """A centred rectangle ``length_nm`` along x by ``width_nm`` along y; all arguments broadcast to (B,).

    Raises
    ------
    MetalayError
        If the rectangle does not fit strictly inside the cell.
    """
    length_nm, width_nm, eps_inside, eps_outside = np.broadcast_arrays(
        np.asarray(length_nm, float), np.asarray(width_nm, float),
        np.asarray(eps_inside, complex), np.asarray(eps_outside, complex))
    length_nm, width_nm = np.atleast_1d(length_nm), np.atleast_1d(width_nm)
    eps_inside, eps_outside = np.atleast_1d(eps_inside), np.atleast_1d(eps_outside)
    if np.any(length_nm <= 0) or np.any(width_nm <= 0) or np.any(length_nm >= period_x_nm) \
            or np.any(width_nm >= period_y_nm):
        raise MetalayError(f"rectangle {length_nm.max()} x {width_nm.max()} nm must fit inside the "
                           f"{period_x_nm} x {period_y_nm} nm cell (0 < length < period_x, 0 < width < period_y)")
    b = length_nm.shape[0]
    hx, hy = period_x_nm / 2, period_y_nm / 2
    xe = np.stack([np.full(b, -hx), -length_nm / 2, length_nm / 2, np.full(b, hx)], axis=1)
    ye = np.stack([np.full(b, -hy), -width_nm / 2, width_nm / 2, np.full(b, hy)], axis=1)
    eps = np.broadcast_to(eps_outside[:, None, None], (b, 3, 3)).copy()
    eps[:, 1, 1] = eps_inside
    return Pattern(xe, ye, eps)


def ellipse_pattern(major_nm, minor_nm, eps_inside, eps_outside, period_x_nm: float, period_y_nm: float,
                    *, n_stairs: int = 12) -> Pattern:
    """A centred ellipse (axis ``major_nm`` along x, ``minor_nm`` along y) staircased into rectangles.

    The ellipse is cut into ``2*n_stairs`` slabs of equal height along y; each slab is a rectangle whose length
    keeps the slab's exact area (so the filling fraction of each slab, and the total area, are exact). A circle
    is ``major_nm == minor_nm``. All geometry arguments broadcast to (B,).

    Notes
    -----
    Slab k spans ``y in [y_k, y_{k+1}]`` with ``y_k = b (k/n - 1)`` for ``b = minor/2``, ``n = n_stairs``; its
    length is ``2 a * (mean of sqrt(1 - (y/b)^2) over the slab)``, with ``a = major/2``, computed in closed form
    from ``integral sqrt(1-u^2) du = (u sqrt(1-u^2) + asin u)/2``.
    """
    major_nm, minor_nm, eps_inside, eps_outside = np.broadcast_arrays(
        np.asarray(major_nm, float), np.asarray(minor_nm, float),
        np.asarray(eps_inside, complex), np.asarray(eps_outside, complex))
    major_nm, minor_nm = np.atleast_1d(major_nm), np.atleast_1d(minor_nm)
    eps_inside, eps_outside = np.atleast_1d(eps_inside), np.atleast_1d(eps_outside)
    if np.any(major_nm <= 0) or np.any(minor_nm <= 0) or np.any(major_nm >= period_x_nm) \
            or np.any(minor_nm >= period_y_nm):
        raise MetalayError(f"ellipse {major_nm.max()} x {minor_nm.max()} nm must fit inside the "
                           f"{period_x_nm} x {period_y_nm} nm cell")
    b = major_nm.shape[0]
    n = int(n_stairs)
    u = np.linspace(-1.0, 1.0, 2 * n + 1)                       # slab edges in units of the semi-minor axis
    prim = 0.5 * (u * np.sqrt(np.clip(1 - u**2, 0, None)) + np.arcsin(u))
    mean_chord = np.diff(prim) / np.diff(u)                      # mean of sqrt(1-u^2) over each slab, (2n,)
    half_len = (major_nm / 2)[:, None] * mean_chord[None, :]      # (B, 2n)
    # y edges: cell edge, 2n+1 slab edges, cell edge -> 2n+2 rows
    ys = (minor_nm / 2)[:, None] * u[None, :]
    ye = np.concatenate([np.full((b, 1), -period_y_nm / 2), ys, np.full((b, 1), period_y_nm / 2)], axis=1)
    # x edges: union of the distinct slab half-lengths (slab k and 2n-1-k are equal by symmetry)
    hl = half_len[:, :n]                                          # increasing towards the centre
    xs = np.concatenate([-hl[:, ::-1], hl], axis=1)               # 2n increasing edges
    xe = np.concatenate([np.full((b, 1), -period_x_nm / 2), xs, np.full((b, 1), period_x_nm / 2)], axis=1)
    ni, nj = xe.shape[1] - 1, ye.shape[1] - 1                     # 2n+1 columns, 2n+2 rows
    xc = 0.5 * (xe[:, 1:] + xe[:, :-1])                           # (B, I)
    inside = np.zeros((b, ni, nj), dtype=bool)
    inside[:, :, 1:-1] = np.abs(xc)[:, :, None] < half_len[:, None, :]
    eps = np.where(inside, eps_inside[:, None, None], eps_outside[:, None, None])
    return Pattern(xe, ye, eps)


# ----------------------------------------------------------------------------------------------------------------
# Fourier coefficients and factorisation


def _block_coeffs(edges: np.ndarray, period: float, orders: np.ndarray) -> np.ndarray:
    """Fourier coefficients of the indicator of each block: (B, I, P) for orders (P,).

    ``f_i(p) = (1/L) int_{e_i}^{e_{i+1}} exp(-i 2 pi p x / L) dx = (w/L) sinc(p w / L) exp(-i 2 pi p c / L)``.
    """
    w = np.diff(edges, axis=1)[:, :, None]
    c = 0.5 * (edges[:, 1:] + edges[:, :-1])[:, :, None]
    p = orders[None, None, :]
    return (w / period) * np.sinc(p * w / period) * np.exp(-2j * np.pi * p * c / period)


def _toeplitz(coeffs: np.ndarray, m: int) -> np.ndarray:
    """Toeplitz matrices T[..., a, c] = coeffs[..., (a - c) + 2m] for coeffs over orders -2m..2m."""
    idx = np.arange(2 * m + 1)
    return coeffs[..., (idx[:, None] - idx[None, :]) + 2 * m]


def _eps_matrices(pat: Pattern, mx: int, my: int, px: float, py: float, factorization: str):
    """Return (E_laurent, E_xx, E_yy) as (B, N, N) with N = (2mx+1)(2my+1), m outer, n inner."""
    b = pat.batch
    ox = np.arange(-2 * mx, 2 * mx + 1)
    oy = np.arange(-2 * my, 2 * my + 1)
    fx = _block_coeffs(pat.x_edges_nm, px, ox)        # (B, I, Px)
    fy = _block_coeffs(pat.y_edges_nm, py, oy)        # (B, J, Py)
    eps = pat.eps
    nx, ny = 2 * mx + 1, 2 * my + 1
    n = nx * ny

    def kron_sum(a, c):
        # sum_k a[b,k,m,m'] c[b,k,n,n'] -> (B, N, N)
        return np.einsum("bkac,bkdf->badcf", a, c, optimize=True).reshape(b, n, n)

    c2 = np.einsum("bij,bip,bjq->bpq", eps, fx, fy, optimize=True)   # 2D Fourier coefficients
    ia = np.arange(nx)
    ja = np.arange(ny)
    dm = (ia[:, None, None, None] - ia[None, None, :, None]) + 2 * mx
    dn = (ja[None, :, None, None] - ja[None, None, None, :]) + 2 * my
    e_l = c2[:, dm, dn].reshape(b, n, n)
    if factorization == "laurent":
        return e_l, e_l, e_l
    # E_xx: inverse rule along x for each row j, then Laurent along y
    inv_row = np.einsum("bij,bip->bjp", 1.0 / eps, fx, optimize=True)          # (B, J, Px)
    a_rows = np.linalg.inv(_toeplitz(inv_row, mx))                             # (B, J, nx, nx)
    ty = _toeplitz(fy, my)                                                     # (B, J, ny, ny)
    e_xx = kron_sum(a_rows, ty)
    # E_yy: inverse rule along y for each column i, then Laurent along x
    inv_col = np.einsum("bij,bjq->biq", 1.0 / eps, fy, optimize=True)          # (B, I, Py)
    b_cols = np.linalg.inv(_toeplitz(inv_col, my))                             # (B, I, ny, ny)
    tx = _toeplitz(fx, mx)                                                     # (B, I, nx, nx)
    e_yy = kron_sum(tx, b_cols)
    return e_l, e_xx, e_yy


# ----------------------------------------------------------------------------------------------------------------
# Modes and scattering matrices


def _forward_sqrt(lam2: np.ndarray) -> np.ndarray:
    """Square root with Im q > 0 (decaying to +z), or Re q > 0 for propagating modes."""
    q = np.sqrt(lam2.astype(complex))
    flip = q.imag < -1e-12 * np.maximum(np.abs(q), 1e-300)
    q = np.where(flip, -q, q)
    return np.where(np.abs(q) < 1e-12, 1e-12 + 0j, q)


def _q_matrix(kx, ky, e_xx, e_yy, e_xy=None, e_yx=None):
    """Q of dh/dz = i Q [Ex; Ey] (normalised units): [[-KxKy - Eyx, Kx^2 - Eyy], [Exx - Ky^2, KyKx + Exy]].

    ``E_xy``, ``E_yx`` are the off-diagonal in-plane permittivity operators (``D_x = E_xx E_x + E_xy E_y``,
    ``D_y = E_yx E_x + E_yy E_y``); None for layers whose operator is diagonal (Li's rules, Laurent's rule).
    """
    b, n = kx.shape
    q = np.empty((b, 2 * n, 2 * n), dtype=np.result_type(e_xx, e_yy, kx))
    d = np.arange(n)
    q[:, :n, :n] = 0 if e_yx is None else -e_yx
    q[:, n:, n:] = 0 if e_xy is None else e_xy
    q[:, :n, n:] = -e_yy
    q[:, n:, :n] = e_xx
    q[:, d, d] = -kx * ky
    q[:, n + d, n + d] = kx * ky
    q[:, d, n + d] += kx**2
    q[:, n + d, d] -= ky**2
    return q


# 2x2-block-diagonal algebra for uniform media: arrays (B, N, 2, 2), block k couples (Ex_k, Ey_k).

def _uniform_blocks(eps, kx, ky):
    """V of a uniform medium as 2x2 blocks per harmonic (W = I), and q (B, N)."""
    e = eps[:, None]
    qz = _forward_sqrt(e - kx**2 - ky**2)
    v = np.empty(kx.shape + (2, 2), dtype=complex)
    v[..., 0, 0] = -kx * ky / qz
    v[..., 0, 1] = (kx**2 - e) / qz
    v[..., 1, 0] = (e - ky**2) / qz
    v[..., 1, 1] = kx * ky / qz
    return v, qz


def _dense(blk):
    """Expand 2x2 blocks (B, N, 2, 2) to a dense (B, 2N, 2N) matrix in the [Ex (N); Ey (N)] ordering."""
    b, n = blk.shape[:2]
    out = np.zeros((b, 2 * n, 2 * n), dtype=blk.dtype)
    d = np.arange(n)
    out[:, d, d] = blk[..., 0, 0]
    out[:, d, n + d] = blk[..., 0, 1]
    out[:, n + d, d] = blk[..., 1, 0]
    out[:, n + d, n + d] = blk[..., 1, 1]
    return out


def _bdiag(x):
    """Diagonal (B, 2N) (ordering [x-part; y-part]) as 2x2 blocks (B, N, 2, 2)."""
    n = x.shape[1] // 2
    out = np.zeros(x.shape[:1] + (n, 2, 2), dtype=x.dtype)
    out[..., 0, 0] = x[:, :n]
    out[..., 1, 1] = x[:, n:]
    return out


def _patterned_modes(e_l, e_xx, e_yy, kx, ky, e_xy=None, e_yx=None):
    """Eigenmodes of a patterned layer: W (B,2N,2N), V = Q W q^-1, q (B,2N)."""
    b, n = kx.shape
    einv = np.linalg.inv(e_l)
    kxm = kx[:, :, None]
    kym = ky[:, :, None]
    p = np.empty((b, 2 * n, 2 * n), dtype=complex)
    eye = np.eye(n)
    p[:, :n, :n] = kxm * einv * ky[:, None, :]
    p[:, :n, n:] = eye - kxm * einv * kx[:, None, :]
    p[:, n:, :n] = kym * einv * ky[:, None, :] - eye
    p[:, n:, n:] = -kym * einv * kx[:, None, :]
    qm = _q_matrix(kx, ky, e_xx, e_yy, e_xy, e_yx)
    omega2 = p @ qm
    scale = np.abs(omega2).max()
    if np.abs(omega2.imag).max() <= 1e-13 * scale:
        # lossless, mirror-symmetric cell: the operator is real and the real eigensolver is ~3x faster
        lam2, w = np.linalg.eig(omega2.real)
        lam2, w = lam2.astype(complex), w.astype(complex)
    else:
        lam2, w = np.linalg.eig(omega2)
    q = _forward_sqrt(lam2)
    v = (qm @ w) / q[:, None, :]
    return w, v, q


def _star(sa, sb):
    """Redheffer star product of S-matrices given as tuples (S11, S12, S21, S22) of dense (B, n, n)."""
    a11, a12, a21, a22 = sa
    b11, b12, b21, b22 = sb
    eye = np.eye(a11.shape[-1])
    d = np.linalg.solve((eye - b11 @ a22).swapaxes(-1, -2), a12.swapaxes(-1, -2)).swapaxes(-1, -2)
    f = np.linalg.solve((eye - a22 @ b11).swapaxes(-1, -2), b21.swapaxes(-1, -2)).swapaxes(-1, -2)
    return (a11 + d @ b11 @ a21, d @ b12, f @ a21, b22 + f @ a22 @ b12)


def _star_blocks(sa, sb):
    """Star product of 2x2-block-diagonal S-matrices (arrays (B, N, 2, 2))."""
    a11, a12, a21, a22 = sa
    b11, b12, b21, b22 = sb
    eye = np.eye(2)
    d = a12 @ np.linalg.inv(eye - b11 @ a22)
    f = b21 @ np.linalg.inv(eye - a22 @ b11)
    return (a11 + d @ b11 @ a21, d @ b12, f @ a21, b22 + f @ a22 @ b12)


def _layer_smatrix(w, v, q, v0, k0d):
    """S-matrix of a patterned layer of normalised thickness k0*d between two gap media (Rumpf 2011).

    ``A = W^-1 W0 + V^-1 V0``, ``B = W^-1 W0 - V^-1 V0``, ``X = exp(i q k0 d)``,
    ``S11 = S22 = (A - X B A^-1 X B)^-1 (X B A^-1 X A - B)``, ``S12 = S21 = (A - X B A^-1 X B)^-1 X (A - B A^-1 B)``.
    """
    winv = np.linalg.inv(w)
    vv = np.linalg.solve(v, v0)
    a = winv + vv
    bm = winv - vv
    x = np.exp(1j * q * k0d[:, None])                               # (B, 2N)
    ainv = np.linalg.inv(a)
    xbai = (x[:, :, None] * bm) @ ainv
    m = a - (xbai * x[:, None, :]) @ bm
    s11 = np.linalg.solve(m, (xbai * x[:, None, :]) @ a - bm)
    s12 = np.linalg.solve(m, x[:, :, None] * (a - bm @ ainv @ bm))
    return (s11, s12, s12, s11)


def _uniform_layer_blocks(v, q, v0, k0d):
    """Block form of :func:`_layer_smatrix` for a uniform layer (W = I, V and V0 2x2-block-diagonal)."""
    vv = np.linalg.solve(v, v0)
    eye = np.eye(2)
    a = eye + vv
    bm = eye - vv
    x = _bdiag(np.exp(1j * np.concatenate([q, q], axis=1) * k0d[:, None]))
    ainv = np.linalg.inv(a)
    xbai = x @ bm @ ainv
    m = a - xbai @ x @ bm
    minv = np.linalg.inv(m)
    s11 = minv @ (xbai @ x @ a - bm)
    s12 = minv @ x @ (a - bm @ ainv @ bm)
    return (s11, s12, s12, s11)


def _side_blocks(v_ext, v0, side: str):
    """S-matrix of the superstrate ("ref") or substrate ("trn") half-space against the gap (Rumpf 2011), blocks."""
    eye = np.eye(2)
    vv = np.linalg.solve(v0, v_ext)
    a = eye + vv
    bm = eye - vv
    ainv = np.linalg.inv(a)
    if side == "ref":
        return (-ainv @ bm, 2 * ainv, 0.5 * (a - bm @ ainv @ bm), bm @ ainv)
    return (bm @ ainv, 0.5 * (a - bm @ ainv @ bm), 2 * ainv, -ainv @ bm)


def _flux(ex, ey, kx, ky, kz):
    """Normalised z-flux Re(E x h*)_z of plane waves with tangential E and wavevector (kx, ky, kz), h = k x E."""
    ez = -(kx * ex + ky * ey) / kz
    hx = ky * ez - kz * ey
    hy = kz * ex - kx * ez
    return np.real(ex * np.conj(hy) - ey * np.conj(hx))


# ----------------------------------------------------------------------------------------------------------------
# Public solver


#: Default convergence target of ``harmonics="auto"`` (also the library builder's default): largest change of
#: any zeroth-order |J| element, and of the phase of any element with |J| >= 0.1, when 2 orders per axis are added.
DEFAULT_TOLERANCE_ABS_T = 2e-3
DEFAULT_TOLERANCE_PHASE_DEG = 0.5
FACTORIZATIONS = ("auto", "li", "nv", "laurent")


def solve(stack: Stack, wavelength_nm, *, harmonics="auto", theta_deg: float = 0.0, phi_deg: float = 0.0,
          factorization: str = "auto", batch_chunk: int | None = None,
          tolerance_abs_t: float = DEFAULT_TOLERANCE_ABS_T, tolerance_phase_deg: float = DEFAULT_TOLERANCE_PHASE_DEG,
          max_harmonics: int = 30, converge_on: tuple = ("t", "r")) -> RcwaResult:
    """Solve a 2D-periodic stack for plane-wave incidence, both polarisations at once.

    Parameters
    ----------
    stack : Stack
        Permittivities batched over B (geometries and/or wavelengths). Patterned layers are a rectilinear
        :class:`Pattern` or a :class:`metalay.cells.rcwa_nv.PolygonPattern` (polygons with edges of any direction).
    wavelength_nm : float or ndarray (B,)
        Vacuum wavelength per batch item.
    harmonics : (int, int) or "auto"
        Truncation ``(Mx, My)``: orders ``-Mx..Mx`` along x and ``-My..My`` along y. "auto" (default) chooses it
        from the convergence target: starting at 4 orders along the shorter period (scaled by the period ratio
        along the other axis), 2 orders per axis are added until the zeroth-order Jones matrices change by less
        than ``tolerance_abs_t`` in every ``|J|`` and ``tolerance_phase_deg`` in the phase of every element with
        ``|J| >= 0.1``; the finer solve is returned and ``settings["convergence"]`` records the truncation and the
        change achieved (``converged`` False when ``max_harmonics`` stopped it first).
    theta_deg, phi_deg : float
        Polar angle of incidence in the superstrate and azimuth from +x.
    factorization : {"auto", "li", "nv", "laurent"}
        Permittivity factorisation per patterned layer. "auto": Li's rules (inverse rule along x and y) for a
        layer whose edges are all axis-parallel (every :class:`Pattern`, and polygon layers with axis-parallel
        edges, converted to blocks exactly), otherwise the normal-vector method ("nv"). "li" on a polygon layer
        with oblique edges is refused (it is not valid there); "laurent" is the basic formulation.
        ``settings["factorization_per_layer"]`` records the rule used for each layer.
    batch_chunk : int, optional
        Solve at most this many batch items at once (bounds memory); default from the matrix size.
    tolerance_abs_t, tolerance_phase_deg, max_harmonics, converge_on
        Convergence target of ``harmonics="auto"`` (``converge_on``: which Jones matrices, "t" and/or "r").

    Returns
    -------
    RcwaResult

    Notes
    -----
    Normalised units ``k0 = 2 pi / lambda``, ``z' = k0 z``, ``h = eta0 H``: ``dE_t/dz' = i P h_t``,
    ``dh_t/dz' = i Q E_t`` with ``P = [[Kx E^-1 Ky, I - Kx E^-1 Kx], [Ky E^-1 Ky - I, -Ky E^-1 Kx]]`` and
    ``Q = [[-Kx Ky - E_yx, Kx^2 - E_yy], [E_xx - Ky^2, Ky Kx + E_xy]]``; layer modes from the eigenproblem
    ``P Q W = W q^2``, ``V = Q W q^-1``. Zeroth-order amplitudes are scaled by ``sqrt(flux_out/flux_in)`` so that
    ``|J|^2`` is a power ratio.

    References
    ----------
    Moharam et al. 1995, JOSA A 12, 1068; Li 1997, JOSA A 14, 2758; Schuster et al. 2007, JOSA A 24, 2880;
    Rumpf 2011, PIER B 35, 241.
    """
    if factorization not in FACTORIZATIONS:
        raise MetalayError(f"factorization {factorization!r} not in {FACTORIZATIONS}")
    if isinstance(harmonics, str):
        if harmonics != "auto":
            raise MetalayError(f"harmonics {harmonics!r} must be 'auto' or a pair of non-negative integers")
        return _solve_converged(stack, wavelength_nm, theta_deg=theta_deg, phi_deg=phi_deg,
                                factorization=factorization, batch_chunk=batch_chunk, tol_abs=tolerance_abs_t,
                                tol_phase=tolerance_phase_deg, max_harmonics=max_harmonics, converge_on=converge_on)
    mx, my = (int(h) for h in harmonics)
    if mx < 0 or my < 0:
        raise MetalayError(f"harmonics {harmonics} must be non-negative integers")
    b = np.asarray(stack.eps_superstrate).reshape(-1).shape[0]
    for lay in stack.layers:
        bb = lay.eps.batch if _is_patterned(lay.eps) else np.asarray(lay.eps).reshape(-1).shape[0]
        b = max(b, bb)
    for k, lay in enumerate(stack.layers):
        d = np.asarray(lay.thickness_nm, float)
        if not np.all(np.isfinite(d)) or np.any(d < 0):
            raise MetalayError(f"layer {k}: thickness_nm must be finite and >= 0, got {d}")
    rules = _layer_rules(stack, factorization)
    n2 = 2 * (2 * mx + 1) * (2 * my + 1)
    if batch_chunk is None:
        batch_chunk = max(1, int(1.5e8 // (n2 * n2 * 16 * 12)))
    if b > batch_chunk:
        parts = []
        for s in range(0, b, batch_chunk):
            sl = slice(s, min(b, s + batch_chunk))
            parts.append(solve(_slice_stack(stack, sl, b), _slice_b(wavelength_nm, sl, b, float),
                               harmonics=harmonics, theta_deg=theta_deg, phi_deg=phi_deg,
                               factorization=factorization, batch_chunk=batch_chunk))
        cat = lambda name: np.concatenate([getattr(r, name) for r in parts], axis=0)  # noqa: E731
        fields = {k: (v if k in ("m", "n") else np.concatenate([r.order_fields[k] for r in parts], axis=0))
                  for k, v in parts[0].order_fields.items()}
        return RcwaResult(cat("t_jones"), cat("r_jones"), cat("power_t"), cat("power_r"), cat("orders_t"),
                          cat("orders_r"), (mx, my), parts[0].settings, fields)
    return _solve_batch(stack, wavelength_nm, b, mx, my, theta_deg, phi_deg, rules)


def _is_patterned(eps) -> bool:
    from metalay.cells.rcwa_nv import PolygonPattern

    return isinstance(eps, (Pattern, PolygonPattern))


_RULE_NAMES = {"li": "Li 1997 inverse rule along x and y (axis-parallel edges)",
               "nv": "normal-vector method (Schuster et al. 2007)", "laurent": "Laurent's rule (basic formulation)",
               "uniform": "uniform layer (exact)"}


def _layer_rules(stack: Stack, factorization: str) -> tuple:
    """Rule used per layer: "uniform", "li", "nv" or "laurent" (the automatic choice of module docstring)."""
    from metalay.cells.rcwa_nv import PolygonPattern, axis_parallel

    rules = []
    for k, lay in enumerate(stack.layers):
        if not _is_patterned(lay.eps):
            rules.append("uniform")
        elif factorization == "laurent":
            rules.append("laurent")
        elif isinstance(lay.eps, Pattern):
            if factorization == "nv":
                raise MetalayError(f"layer {k}: the normal-vector rule needs a polygon layer (PolygonPattern); "
                                   "a rectilinear Pattern uses 'li' or 'laurent'")
            rules.append("li")
        else:
            parallel = axis_parallel(lay.eps)
            if factorization == "li" and not parallel:
                raise MetalayError(f"layer {k}: Li's inverse rule along x and y is valid only for axis-parallel "
                                   "edges; this polygon layer has oblique edges (use 'auto' or 'nv')")
            rules.append("li" if parallel and factorization != "nv" else "nv")
        if rules[-1] != "uniform" and isinstance(lay.eps, PolygonPattern) and \
                (abs(lay.eps.period_x_nm - stack.period_x_nm) > 1e-9 or
                 abs(lay.eps.period_y_nm - stack.period_y_nm) > 1e-9):
            raise MetalayError(f"layer {k}: polygon pattern period ({lay.eps.period_x_nm}, {lay.eps.period_y_nm}) "
                               f"nm differs from the stack's ({stack.period_x_nm}, {stack.period_y_nm}) nm")
    return tuple(rules)


def _start_harmonics(stack: Stack, base: int = 4) -> tuple:
    """Starting truncation of the automatic choice: ``base`` orders along the shorter period, scaled by the
    period ratio along the other axis (the same spatial resolution on both axes)."""
    px, py = float(stack.period_x_nm), float(stack.period_y_nm)
    short = min(px, py)
    return max(1, int(round(base * px / short))), max(1, int(round(base * py / short)))


def _jones_change(a: RcwaResult, b: RcwaResult, converge_on) -> tuple:
    """(max change of |J|, max change of phase in deg over elements with |J| >= 0.1) between two results."""
    d_abs, d_ph = 0.0, 0.0
    for side in converge_on:
        ja = a.t_jones if side == "t" else a.r_jones
        jb = b.t_jones if side == "t" else b.r_jones
        d_abs = max(d_abs, float(np.max(np.abs(np.abs(ja) - np.abs(jb)))))
        big = (np.abs(ja) >= 0.1) & (np.abs(jb) >= 0.1)
        if np.any(big):
            d_ph = max(d_ph, float(np.max(np.abs(np.angle(jb[big] / ja[big], deg=True)))))
    return d_abs, d_ph


def _solve_converged(stack, wavelength_nm, *, theta_deg, phi_deg, factorization, batch_chunk, tol_abs, tol_phase,
                     max_harmonics, converge_on) -> RcwaResult:
    """Raise the truncation by 2 orders per axis (scaled by the period ratio) until the change is within the
    tolerances (see :func:`solve`); returns the finer result with ``settings["convergence"]``."""
    if not (tol_abs > 0 and tol_phase > 0):
        raise MetalayError(f"tolerances must be > 0 (got {tol_abs}, {tol_phase} deg)")
    mx0, my0 = _start_harmonics(stack)
    sx, sy = _start_harmonics(stack, 2)
    kw = dict(theta_deg=theta_deg, phi_deg=phi_deg, factorization=factorization, batch_chunk=batch_chunk)
    prev = solve(stack, wavelength_nm, harmonics=(mx0, my0), **kw)
    step = 1
    while True:
        h = (mx0 + step * sx, my0 + step * sy)
        cur = solve(stack, wavelength_nm, harmonics=h, **kw)
        d_abs, d_ph = _jones_change(prev, cur, converge_on)
        done = d_abs <= tol_abs and d_ph <= tol_phase
        if done or max(h) + max(sx, sy) > max_harmonics:
            break
        prev, step = cur, step + 1
    settings = dict(cur.settings)
    settings["convergence"] = {"target_abs_t": float(tol_abs), "target_phase_deg": float(tol_phase),
                               "compared_with": [int(prev.harmonics[0]), int(prev.harmonics[1])],
                               "change_abs_t": d_abs, "change_phase_deg": d_ph, "converged": bool(done)}
    return RcwaResult(cur.t_jones, cur.r_jones, cur.power_t, cur.power_r, cur.orders_t, cur.orders_r, cur.harmonics,
                      settings, cur.order_fields)


def _slice_b(a, sl, b, dtype):
    arr = np.asarray(a, dtype=dtype)
    if arr.ndim == 0 or arr.reshape(-1).shape[0] == 1:
        return arr
    return np.broadcast_to(arr.reshape(-1), (b,))[sl]


def _slice_stack(stack: Stack, sl, b) -> Stack:
    layers = []
    for lay in stack.layers:
        if isinstance(lay.eps, Pattern):
            p = lay.eps
            if p.batch == 1:
                eps = p
            else:
                eps = Pattern(p.x_edges_nm[sl], p.y_edges_nm[sl], p.eps[sl])
        elif _is_patterned(lay.eps):
            eps = lay.eps.sliced(sl)
        else:
            eps = _slice_b(lay.eps, sl, b, complex)
        layers.append(Layer(_slice_b(lay.thickness_nm, sl, b, float), eps))
    return Stack(_slice_b(stack.eps_superstrate, sl, b, complex), tuple(layers),
                 _slice_b(stack.eps_substrate, sl, b, complex), stack.period_x_nm, stack.period_y_nm)


def _expand_pattern(p: Pattern, b: int) -> Pattern:
    if p.batch == b:
        return p
    return Pattern(np.broadcast_to(p.x_edges_nm, (b,) + p.x_edges_nm.shape[1:]),
                   np.broadcast_to(p.y_edges_nm, (b,) + p.y_edges_nm.shape[1:]),
                   np.broadcast_to(p.eps, (b,) + p.eps.shape[1:]))


def _layer_operators(pat, rule: str, b: int, mx: int, my: int, px: float, py: float):
    """(E_zz Laurent, E_xx, E_xy, E_yx, E_yy) of a patterned layer under ``rule`` (off-diagonals None when 0)."""
    from metalay.cells.rcwa_nv import nv_eps_matrices, to_blocks

    if isinstance(pat, Pattern):
        e_l, e_xx, e_yy = _eps_matrices(_expand_pattern(pat, b), mx, my, px, py, rule)
        return e_l, e_xx, None, None, e_yy
    if rule == "li":
        e_l, e_xx, e_yy = _eps_matrices(_expand_pattern(to_blocks(pat), b), mx, my, px, py, "li")
        return e_l, e_xx, None, None, e_yy
    return nv_eps_matrices(pat.expanded(b), mx, my, rule)


def _solve_batch(stack, wavelength_nm, b, mx, my, theta_deg, phi_deg, rules):
    k = _wavevectors(stack, wavelength_nm, b, mx, my, theta_deg, phi_deg)
    s11, s21, q_ref, q_trn = _global_smatrix(stack, k, b, mx, my, rules)
    th, ph, nh, zero = k["th"], k["ph"], k["nh"], k["zero"]
    kx, ky = k["kx"], k["ky"]

    # incident zeroth-order fields for p and s input
    cth = np.cos(th)
    s_vec = np.array([-np.sin(ph), np.cos(ph)])
    p_tan = np.array([np.cos(ph), np.sin(ph)]) * cth
    c_inc = np.zeros((b, 2 * nh, 2), dtype=complex)
    c_inc[:, zero, 0], c_inc[:, nh + zero, 0] = p_tan
    c_inc[:, zero, 1], c_inc[:, nh + zero, 1] = s_vec
    c_ref = s11 @ c_inc                                              # (B, 2N, 2) tangential E of reflected orders
    c_trn = s21 @ c_inc
    kz_ref = q_ref[:, :nh]
    kz_trn = q_trn[:, :nh]
    kz_inc = k["n_sup"] * cth + 0j
    flux_in = _flux(c_inc[:, zero, :], c_inc[:, nh + zero, :], kx[:, zero, None], ky[:, zero, None],
                    kz_inc[:, None])                                  # (B, 2)
    ord_r = -_flux(c_ref[:, :nh, :], c_ref[:, nh:, :], kx[:, :, None], ky[:, :, None],
                   -kz_ref[:, :, None]) / flux_in[:, None, :]
    ord_t = _flux(c_trn[:, :nh, :], c_trn[:, nh:, :], kx[:, :, None], ky[:, :, None],
                  kz_trn[:, :, None]) / flux_in[:, None, :]
    prop_r = (np.abs(kz_ref.imag) < 1e-9)[:, :, None]
    prop_t = (np.abs(kz_trn.imag) < 1e-9 * np.maximum(1, np.abs(kz_trn)))[:, :, None] | \
        (np.abs(k["e_sub"].imag) > 1e-12)[:, None, None]
    ord_r = np.where(prop_r, ord_r, 0.0)
    ord_t = np.where(prop_t, ord_t, 0.0)
    t_j = _zeroth_jones(c_trn, kz_trn, 1.0, k, flux_in)
    r_j = _zeroth_jones(c_ref, kz_ref, -1.0, k, flux_in)
    settings = {"method": "RCWA / Fourier modal method, scattering matrices (Rumpf 2011)",
                "factorization": "; ".join(sorted({_RULE_NAMES[r] for r in rules if r != "uniform"})) or "none",
                "factorization_per_layer": list(rules),
                "harmonics_x": mx, "harmonics_y": my, "truncation": "rectangular",
                "theta_deg": float(theta_deg), "phi_deg": float(phi_deg)}
    fields = {"t": c_trn, "r": c_ref, "kx": kx, "ky": ky, "kz_t": kz_trn, "kz_r": kz_ref, "flux_in": flux_in,
              "m": k["m"], "n": k["n"], "prop_t": prop_t[:, :, 0], "prop_r": prop_r[:, :, 0]}
    return RcwaResult(t_j, r_j, ord_t.sum(axis=1), ord_r.sum(axis=1), np.moveaxis(ord_t, 2, 1),
                      np.moveaxis(ord_r, 2, 1), (mx, my), settings, fields)


def _wavevectors(stack, wavelength_nm, b, mx, my, theta_deg, phi_deg) -> dict:
    """Normalised in-plane wavevectors of the retained orders (m outer, n inner) and the media of the batch."""
    px, py = float(stack.period_x_nm), float(stack.period_y_nm)
    wl = _as_batch(wavelength_nm, b, float)
    e_sup = _as_batch(stack.eps_superstrate, b)
    e_sub = _as_batch(stack.eps_substrate, b)
    if np.any(np.abs(e_sup.imag) > 1e-12) or np.any(e_sup.real <= 0):
        raise MetalayError("the superstrate (incident medium) must be a lossless dielectric (real eps > 0)")
    n_sup = np.sqrt(e_sup.real)
    th, ph = np.deg2rad(theta_deg), np.deg2rad(phi_deg)
    kx0 = n_sup * np.sin(th) * np.cos(ph)
    ky0 = n_sup * np.sin(th) * np.sin(ph)
    m = np.repeat(np.arange(-mx, mx + 1), 2 * my + 1)
    n = np.tile(np.arange(-my, my + 1), 2 * mx + 1)
    kx = kx0[:, None] + m[None, :] * (wl / px)[:, None]
    ky = ky0[:, None] + n[None, :] * (wl / py)[:, None]
    return {"px": px, "py": py, "wl": wl, "e_sup": e_sup, "e_sub": e_sub, "n_sup": n_sup, "th": th, "ph": ph,
            "kx0": kx0, "ky0": ky0, "m": m, "n": n, "kx": kx, "ky": ky, "k0": 2 * np.pi / wl, "nh": m.shape[0],
            "zero": int(np.flatnonzero((m == 0) & (n == 0))[0])}


def _global_smatrix(stack, k: dict, b, mx, my, rules):
    """Global scattering matrix of the stack (``S11``, ``S21``) and the longitudinal wavenumbers of both sides."""
    kx, ky = k["kx"], k["ky"]
    e_gap = (1.0 + k["kx0"]**2 + k["ky0"]**2).astype(complex)
    v0b, _ = _uniform_blocks(e_gap, kx, ky)
    v_ref, q_ref = _uniform_blocks(k["e_sup"], kx, ky)
    v_trn, q_trn = _uniform_blocks(k["e_sub"], kx, ky)
    # S-matrices of runs of uniform media are kept 2x2-block-diagonal (O(N)); only patterned layers are dense.
    pieces = [("blocks", _side_blocks(v_ref, v0b, "ref"))]
    v0 = None
    for lay, rule in zip(stack.layers, rules):
        d = _as_batch(lay.thickness_nm, b, float)
        if rule != "uniform":
            if v0 is None:
                v0 = _dense(v0b)
            e_l, e_xx, e_xy, e_yx, e_yy = _layer_operators(lay.eps, rule, b, mx, my, k["px"], k["py"])
            w, v, q = _patterned_modes(e_l, e_xx, e_yy, kx, ky, e_xy, e_yx)
            pieces.append(("dense", _layer_smatrix(w, v, q, v0, k["k0"] * d)))
        else:
            v, q = _uniform_blocks(_as_batch(lay.eps, b), kx, ky)
            pieces.append(("blocks", _uniform_layer_blocks(v, q, v0b, k["k0"] * d)))
    pieces.append(("blocks", _side_blocks(v_trn, v0b, "trn")))
    merged = [pieces[0]]
    for kind, s in pieces[1:]:
        if kind == "blocks" and merged[-1][0] == "blocks":
            merged[-1] = ("blocks", _star_blocks(merged[-1][1], s))
        else:
            merged.append((kind, s))
    s_glob = None
    for kind, s in merged:
        s = tuple(_dense(x) for x in s) if kind == "blocks" else s
        s_glob = s if s_glob is None else _star(s_glob, s)
    s11, _, s21, _ = s_glob
    return s11, s21, np.concatenate([q_ref, q_ref], axis=1), np.concatenate([q_trn, q_trn], axis=1)


def _zeroth_jones(c, kz, sign, k: dict, flux_in):
    """Jones matrix (p, s basis) of the zeroth order, amplitudes normalised to the incident flux."""
    ph, zero, nh, kx, ky = k["ph"], k["zero"], k["nh"], k["kx"], k["ky"]
    ex, ey = c[:, zero, :], c[:, nh + zero, :]                      # (B, 2 inputs)
    s_vec = np.array([-np.sin(ph), np.cos(ph)])
    a_s = ex * s_vec[0] + ey * s_vec[1]
    kzz = kz[:, zero][:, None]
    nmed = np.sqrt(kx[:, zero, None] ** 2 + ky[:, zero, None] ** 2 + kzz**2)
    a_p = (ex * np.cos(ph) + ey * np.sin(ph)) / (kzz / nmed)
    # flux of unit-amplitude p and s waves in this medium (for the power normalisation)
    st = np.sin(ph), np.cos(ph)
    f_s = np.abs(_flux(-st[0] + 0 * kzz, st[1] + 0 * kzz, kx[:, zero, None], ky[:, zero, None], sign * kzz))
    ptx, pty = np.cos(ph) * kzz / nmed, np.sin(ph) * kzz / nmed
    f_p = np.abs(_flux(ptx, pty, kx[:, zero, None], ky[:, zero, None], sign * kzz))
    return np.stack([a_p * np.sqrt(f_p / flux_in[:, :1]), a_s * np.sqrt(f_s / flux_in[:, 1:])], axis=1)


def order_powers(result: RcwaResult, polarization, side: str = "t") -> np.ndarray:
    """Power of every diffraction order for an input polarisation given as (p, s) amplitudes.

    Parameters
    ----------
    result : RcwaResult
    polarization : array_like (2,) complex
        Input Jones vector in the (p, s) basis (= (x, y) at normal incidence with azimuth 0), e.g.
        ``(1, 1j * sigma) / sqrt 2`` for spin ``sigma``; normalised here.
    side : {"t", "r"}

    Returns
    -------
    ndarray (B, N) float
        Power per order divided by the incident power; orders flattened with m outer, n inner
        (``result.order_fields["m"]``, ``["n"]`` give them).

    Notes
    -----
    The fields of each order are linear in the input, so the order amplitudes of any polarisation are the
    superposition of the p and s solutions; the power is the z-flux of the plane wave of that order.
    """
    f = result.order_fields
    if f is None:
        raise MetalayError("this result carries no per-order fields")
    a = np.asarray(polarization, complex).reshape(2)
    a = a / np.linalg.norm(a)
    c = f[side] @ a                                                     # (B, 2N)
    nh = f["kx"].shape[1]
    flux_in = np.abs(a[0]) ** 2 * f["flux_in"][:, 0] + np.abs(a[1]) ** 2 * f["flux_in"][:, 1]
    kz = f["kz_t"] if side == "t" else -f["kz_r"]
    pw = _flux(c[:, :nh], c[:, nh:], f["kx"], f["ky"], kz) / flux_in[:, None]
    pw = pw if side == "t" else -pw
    return np.where(f["prop_t" if side == "t" else "prop_r"], pw, 0.0)


def jones_circular(t_long, t_short):
    """Converted and leakage amplitudes of a geometric-phase cell from its principal responses.

    Parameters
    ----------
    t_long, t_short : complex array_like
        Responses for light polarised along the long / short axis.

    Returns
    -------
    converted, leakage : complex ndarray
        ``(t_long - t_short)/2`` and ``(t_long + t_short)/2``; ``|converted|^2`` is the conversion efficiency.

    Notes
    -----
    For ``J = R(-theta) diag(t_l, t_s) R(theta)`` and input ``|sigma> = (x + i sigma y)/sqrt 2``, the output is
    ``(t_l + t_s)/2 |sigma> + (t_l - t_s)/2 exp(2 i sigma theta) |-sigma>``.

    References
    ----------
    Pancharatnam 1956, Proc. Indian Acad. Sci. A 44, 247; Berry 1987, J. Mod. Opt. 34, 1401.
    """
    t_long = np.asarray(t_long, complex)
    t_short = np.asarray(t_short, complex)
    return (t_long - t_short) / 2, (t_long + t_short) / 2
