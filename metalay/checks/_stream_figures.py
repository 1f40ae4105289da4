"""Figures of the streamed optical check beyond the spot powers: OAM spectrum, crosstalk matrix, lens focal spot.

Each is a sum over sites, accumulated chunk by chunk into arrays whose size does not grow with the number of sites
(rings x sectors, channels x channels, a coarse block grid); the formulas, approximations and error bounds are
stated per class and recorded in ``optics.json`` by :mod:`metalay.checks.optics_stream`.

OAM spectrum (:class:`OamAccumulator`). The converted field ``g_s`` of each site, with the tilt/lens/axicon terms
of the design removed (``g_s exp(-i phi_removed(x_s, y_s))``, as the whole-mask check removes them), is summed per
ring ``k`` (width ``dr``, one period) and azimuthal sector ``m`` (``n_phi`` sectors of ``dphi = 2 pi / n_phi``
centred on ``phi_m = m dphi``) about the beam axis, with the first moment of the angular offset
``delta_s = phi_s - phi_m``::

    S[k, m] = sum g_s,      M[k, m] = sum g_s delta_s,       H[k, l] = sum_m exp(-i l phi_m) (S - i l M)[k, m]

(one FFT along ``m``). ``H[k, l]`` approximates the ring's site sum ``sum_s g_s exp(-i l phi_s)`` with
``|error| <= A_k (|l| delta)^2 / 2`` (Taylor remainder of the exponential; ``A_k = sqrt(N_k sum_k |g_s|^2)``, at
least ``sum_k |g_s|`` by Cauchy-Schwarz and equal to it for a uniform amplitude; ``delta`` the largest
``|delta_s|``, at most ``dphi / 2``). The spiral spectrum is the ring quadrature of
``P_l = 2 pi int |c_l(r)|^2 r dr`` with ``c_l(r_k) = H[k, l] / N_k`` (the ring's ``N_k`` sites sample its area
``2 pi r_k dr`` evenly): ``P_l = sum_k |H[k, l]|^2 / N_k``, weight ``P_l / sum_s |g_s|^2`` over the analysed disk
(Parseval; by Cauchy-Schwarz each weight is at most 1). The weight's bound is ``sum_k e (2 |H| + e) / N_k`` over the
same total, ``e = A_k (|l| delta)^2 / 2 + 1e-12 A_k``.

Crosstalk (:class:`ChannelAccumulator`): the whole-mask check's spot matrix over sites,
``A[k, m] = sum_s f_s exp(-i l_k phi_s) exp(-i k0 (u_m x_s + v_m y_s))`` with ``phi_s = atan2(y_s, x_s)``, summed
exactly (floating point only), ``M = |A|^2 / (S sum |f_s|^2)``.

Fringe reading (:class:`NearFieldBlocks`, :func:`fringe_figure`): the same converted field ``g_s exp(-i
phi_removed)`` as the OAM sums, averaged over blocks of ``mx`` sites x ``my`` rows on a fixed grid about the vortex
axis (at most :data:`FRINGE_MAX_BLOCKS` per side, covering the design's aperture): ``F_b = sum_b g_s / (mx my)``,
the mean over the block's lattice cells with cells without an element counted as 0, as the whole-mask check
block-averages its near field. Sites are binned by their integer lattice indices, so every block inside the
aperture holds exactly ``mx my`` sites (no moire of the block counts). The fork interferogram and the charge are
then :func:`metalay.checks.fringes.interferogram` and :func:`metalay.checks.fringes.read_charge` of ``F`` on the
block centres, as the whole-mask check calls them (reference tilted towards +x, 6 blocks per fringe). The block
average is a low-pass of the field: it keeps the vortex winding as long as the phase varies little across a block
on the reading loops (``|l| B / r_loop``, recorded); not a bound, measured against the whole-mask reading.

Lens (:func:`rs_kernel`, :func:`focal_model_bound`): the Rayleigh-Sommerfeld (first kind) focal field at
``P = P0 + Delta`` (``P0`` the designed focus at distance ``f``)::

    U(P) = sum_s f_s a h(P - r_s),     h(r) = (z / rho) (1 / rho - i k) exp(i k rho) / (2 pi rho),   k = 2 pi n / lambda

with ``a`` the cell area. Each site is multiplied by ``h(P0 - r_s)`` (exact) and placed at ``f n_s``,
``n_s = (r_s - P0) / rho_0`` (lateral part of the unit vector from the focus to the site); then
``U(P0 + Delta) = exp(i k |Delta|^2 / (2 f)) sum_s g_s exp(-i k n_s . Delta) (1 + q_s)``: a far field in the
variable ``Delta / f`` (the block sums of :class:`metalay.checks.optics_stream.FarFieldAccumulator`, with their bound)
times a model factor whose deviation ``|q_s|`` is bounded from the Taylor expansion of ``rho`` to second order and
of the amplitude (:func:`focal_model_bound`). Only ``|U|^2`` enters the figures, so the common phase is dropped.

References
----------
Torner, Torres & Carrasco 2005, Opt. Express 13, 873 (spiral spectrum). Heckenberg et al. 1992, Opt. Quantum
Electron. 24, S951 (fork interferograms); Takeda, Ina & Kobayashi 1982, J. Opt. Soc. Am. 72, 156 (fringe analysis).
Mair et al. 2001, Nature 412, 313 (conjugate-vortex probing). Goodman 2005, Introduction to Fourier Optics, 3rd
ed., sec. 3.5 (Rayleigh-Sommerfeld diffraction formula) and ch. 4 (Fraunhofer approximation). Born & Wolf,
Principles of Optics, sec. 8.5.2 (Airy).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from metalay.errors import MetalayError

__all__ = ["OamAccumulator", "ChannelAccumulator", "NearFieldBlocks", "fringe_blocks", "fringe_figure", "rs_kernel",
           "focal_model_bound", "lattice_phasor"]

_FP = 1e-12


@dataclass(eq=False)
class OamAccumulator:
    """Ring x sector sums (and first angular moments) of the converted field about the beam axis."""

    ring_um: float
    n_sectors: int = 1024
    center_um: tuple = (0.0, 0.0)
    grids: list = field(default_factory=list)  # S, M: complex128 (rings, sectors)
    ring_power: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ring_sites: np.ndarray = field(default_factory=lambda: np.zeros(0))
    reach_rad: float = 0.0

    def _grow(self, rings: int) -> None:
        old = self.ring_sites.size
        if rings <= old:
            return
        new = [np.zeros((rings, self.n_sectors), np.complex128) for _ in range(2)]
        for g_new, g_old in zip(new, self.grids):
            g_new[:old] = g_old
        self.grids = new
        self.ring_power, self.ring_sites = (np.concatenate([a, np.zeros(rings - old)]) for a in
                                            (self.ring_power, self.ring_sites))

    def add(self, x_um: np.ndarray, y_um: np.ndarray, g: np.ndarray) -> None:
        """Add sites ``(x_um, y_um)`` (beam frame) with converted fields ``g`` (terms already removed)."""
        if np.size(g) == 0:
            return
        dx, dy = x_um - self.center_um[0], y_um - self.center_um[1]
        ring = (np.sqrt(dx * dx + dy * dy) / self.ring_um).astype(np.int64)
        phi = np.arctan2(dy, dx)
        dphi = 2 * np.pi / self.n_sectors
        sector = np.floor(phi * (1 / dphi) + 0.5)
        delta = phi - sector * dphi
        sector = sector.astype(np.int64) % self.n_sectors
        self._grow(int(ring.max()) + 1)
        self.reach_rad = max(self.reach_rad, float(np.abs(delta).max()))
        idx = ring * self.n_sectors + sector
        g = np.asarray(g, np.complex128)
        lo = int(idx.min())
        idx -= lo
        for grid, w in zip(self.grids, (g, g * delta)):
            flat = grid.reshape(-1)
            part = np.bincount(idx, w.real)
            flat.real[lo:lo + part.size] += part
            flat.imag[lo:lo + part.size] += np.bincount(idx, w.imag)
        rings = self.ring_sites.size
        self.ring_power += np.bincount(ring, g.real * g.real + g.imag * g.imag, minlength=rings)
        self.ring_sites += np.bincount(ring, minlength=rings)

    def spectrum(self, radius_um: float, charges) -> dict:
        """Weights of ``charges`` within ``radius_um`` (whole rings), with their bounds; see the module docstring."""
        charges = np.asarray(list(charges), dtype=np.int64)
        if charges.size and np.abs(charges).max() >= self.n_sectors // 2:
            raise MetalayError(f"oam: charges up to {int(np.abs(charges).max())} need more than {self.n_sectors} "
                               "sectors")
        n_rings = min(self.ring_sites.size, int(math.floor(radius_um / self.ring_um + 1e-9)))
        if n_rings < 1 or not self.grids:
            raise MetalayError(f"oam: no whole ring of width {self.ring_um:g} um within {radius_um:g} um of the axis")
        s, m = (np.fft.fft(g[:n_rings], axis=1) for g in self.grids)
        cols = np.mod(charges, self.n_sectors)
        h = s[:, cols] - 1j * charges[None, :] * m[:, cols]
        n_k = np.maximum(self.ring_sites[:n_rings], 1)[:, None]
        total = float(self.ring_power[:n_rings].sum())
        if total <= 0:
            raise MetalayError("oam: the converted field carries no power within the analysed disk")
        a_k = np.sqrt(self.ring_sites[:n_rings] * self.ring_power[:n_rings])[:, None]  # >= sum_ring |g_s|
        e = a_k * ((np.abs(charges)[None, :] * self.reach_rad) ** 2 / 2 + _FP)
        p = (np.abs(h) ** 2 / n_k).sum(axis=0)
        bound = (e * (2 * np.abs(h) + e) / n_k).sum(axis=0)
        # the ring quadrature of the exact sums is at most 1 per charge (Cauchy-Schwarz): clipping to it only brings
        # the value closer, so the bound still holds
        return {"charges": charges, "weights": np.minimum(p / total, 1.0), "bounds": bound / total,
                "radius_um": n_rings * self.ring_um, "rings": n_rings, "power": total}


@dataclass(eq=False)
class ChannelAccumulator:
    """Spot amplitudes of every conjugate-vortex probe at every channel direction (exact site sums)."""

    channels: tuple
    wavelength_nm: float
    amp: np.ndarray = None
    power: float = 0.0
    sites: int = 0

    def __post_init__(self):
        c = len(self.channels)
        self.amp = np.zeros((c, c), np.complex128)

    def add(self, x_um: np.ndarray, y_um: np.ndarray, f: np.ndarray, direction_phasors: np.ndarray) -> None:
        """``direction_phasors`` (S, C): ``exp(-i k0 (u_m x_s + v_m y_s))`` per site and channel direction."""
        if np.size(f) == 0:
            return
        charges = np.array([ch[0] for ch in self.channels], dtype=np.float64)
        phi = np.arctan2(y_um, x_um)
        f = np.asarray(f, np.complex128)
        probes = f[:, None] * np.exp(-1j * phi[:, None] * charges[None, :])  # (S, C)
        self.amp += probes.T @ direction_phasors
        self.power += float(np.vdot(f, f).real)
        self.sites += int(f.size)

    def matrix(self) -> np.ndarray:
        if self.sites <= 0 or self.power <= 0:
            raise MetalayError("crosstalk: the mask carries no power in the designed polarisation")
        return np.abs(self.amp) ** 2 / (self.sites * self.power)


FRINGE_MAX_BLOCKS = 512
"""Largest side of the fringe grid (blocks): 4 MB of sums whatever the mask size; the reading loops (0.25 to 0.55
of the beam radius) then lie at least 64 blocks from the core of a beam filling the grid."""
FRINGE_SAMPLES_PER_FRINGE = 6.0
"""Blocks per fringe of the tilted reference (as the whole-mask check: :func:`metalay.checks.fringes.default_tilt_deg`
on its sample pitch)."""
FRINGE_MAX_PHASE_RAD = math.pi / FRINGE_SAMPLES_PER_FRINGE
"""Largest vortex phase across a block on the innermost reading loop, ``max(|l|, 1) B / r``, for a reading: the
reading keeps the spectrum within ``f_c / 2 = 1 / (12 B)`` of the carrier, and the vortex's local frequency
``|l| / (2 pi r)`` must lie inside (``|l| B / r < pi / 6``). Beyond, block means of 3 to 17 periods read charge 3 as
2 or 1 (measured on a 40 um mask); the reading is then "unreadable". A grid of ``n`` blocks across a uniform disk
puts the innermost loop (a quarter of the radius) ``n / 8`` blocks from the core: charges up to ``n pi / 48``, 29 for
the 449 blocks of 1e7 sites at 325 nm, 33 for 512."""


@dataclass(eq=False)
class NearFieldBlocks:
    """Sums of the converted field over blocks of ``mx`` sites x ``my`` rows, on a fixed grid of ``ny x nx`` blocks.

    Sites are binned by lattice index: column unit ``h = i`` (square, pitch ``p``) or ``h = 2 i + j % 2``
    (hexagonal, pitch ``p / 2``; a block is ``2 mx`` units wide), row ``j``; block ``(r, c)`` holds ``h`` in
    ``[h0 + c w, h0 + (c + 1) w)`` and ``j`` in ``[j0 + r my, j0 + (r + 1) my)`` (``w = mx`` or ``2 mx``), so every
    whole block holds exactly ``mx my`` sites. Sites outside the grid are counted, not summed.
    """

    mx: int
    my: int
    h0: int
    j0: int
    nx: int
    ny: int
    lattice: str = "square"
    sums: np.ndarray = None
    sites_in: int = 0
    sites_out: int = 0
    origin_um: tuple = (0.0, 0.0)

    def __post_init__(self):
        self.sums = np.zeros((self.ny, self.nx), np.complex128)

    @property
    def width_units(self) -> int:
        return self.mx if self.lattice == "square" else 2 * self.mx

    def add(self, decoded, g: np.ndarray) -> None:
        """Add the sites of ``decoded`` (beam frame; lattice indices ``i``, ``j``) with converted fields ``g``."""
        if np.size(g) == 0:
            return
        h = decoded.i if self.lattice == "square" else 2 * decoded.i + (decoded.j % 2)
        c = (h - self.h0) // self.width_units
        r = (decoded.j - self.j0) // self.my
        inside = (c >= 0) & (c < self.nx) & (r >= 0) & (r < self.ny)
        if self.sites_in == 0 and self.sites_out == 0:
            self.origin_um = tuple(map(float, decoded.origin_um))
        n_in = int(np.count_nonzero(inside))
        self.sites_out += int(inside.size - n_in)
        self.sites_in += n_in
        if n_in < inside.size:
            c, r, g = c[inside], r[inside], g[inside]
        if c.size == 0:
            return
        idx = r * self.nx + c
        # runs of consecutive sites in one block (sites come row by row): summed first, then scattered
        starts = np.concatenate([[0], np.flatnonzero(idx[1:] != idx[:-1]) + 1])
        col = np.add.reduceat(np.asarray(g, np.complex128), starts)
        flat = self.sums.reshape(-1)
        flat.real += np.bincount(idx[starts], col.real, flat.size)
        flat.imag += np.bincount(idx[starts], col.imag, flat.size)

    def field(self, period_um: float):
        """Block means ``F`` (ny, nx) and the block centres ``x_um`` (nx,), ``y_um`` (ny,) (the sites' mean)."""
        w = self.width_units
        pitch_x = period_um if self.lattice == "square" else period_um / 2
        row = period_um if self.lattice == "square" else period_um * math.sqrt(3) / 2
        x = self.origin_um[0] + (self.h0 + w * np.arange(self.nx) + (w - 1) / 2) * pitch_x
        y = self.origin_um[1] + (self.j0 + self.my * np.arange(self.ny) + (self.my - 1) / 2) * row
        return self.sums / (self.mx * self.my), x, y


def fringe_blocks(center_um, half_extent_um, period_um: float, lattice: str, wavelength_nm: float,
                  max_blocks: int = FRINGE_MAX_BLOCKS) -> NearFieldBlocks:
    """The fringe grid: blocks of whole sites and rows, about ``center_um`` (the vortex axis at a block centre),
    covering ``|x| <= half_extent_um[0]``, ``|y| <= half_extent_um[1]``, at most ``max_blocks`` per side.

    The smallest block that fits, and at least ``wavelength / 5`` wide (the reference tilt of 6 blocks per fringe
    then exists: ``sin(tilt) = wavelength / (6 B) < 1``); hexagonal blocks are ``round(2 mx / sqrt(3))`` rows high
    (near square).
    """
    hex_ = lattice != "square"
    pitch_x = period_um / 2 if hex_ else period_um
    row = period_um * math.sqrt(3) / 2 if hex_ else period_um
    ax, ay = center_um[0] / pitch_x, center_um[1] / row
    reach_x = max(abs(ax + half_extent_um[0] / pitch_x), abs(ax - half_extent_um[0] / pitch_x)) + 2
    reach_y = max(abs(ay + half_extent_um[1] / row), abs(ay - half_extent_um[1] / row)) + 2
    mx = int(math.floor(wavelength_nm * 1e-3 / (5 * period_um))) + 1
    while True:  # a few steps at most: the side shrinks as 1 / mx
        w = 2 * mx if hex_ else mx
        my = max(1, round(2 * mx / math.sqrt(3))) if hex_ else mx
        kx, ky = int(math.ceil(reach_x / w)), int(math.ceil(reach_y / my))
        if max(2 * kx + 1, 2 * ky + 1) <= max_blocks:
            break
        mx = max(mx + 1, int(mx * max(2 * kx + 1, 2 * ky + 1) / max_blocks))
    h0 = int(round(ax - (w - 1) / 2)) - kx * w
    j0 = int(round(ay - (my - 1) / 2)) - ky * my
    return NearFieldBlocks(mx, my, h0, j0, 2 * kx + 1, 2 * ky + 1, "square" if not hex_ else "hexagonal")


FRINGE_METHOD = ("block means of the converted field (tilt/lens/axicon terms removed per site, as for the OAM sums) "
                 "over {mx} x {my} lattice cells, on {nx} x {ny} blocks about the vortex axis; fork interferogram "
                 "with a plane reference tilted towards +x ({spf:g} blocks per fringe) and the charge read from it "
                 "(metalay.checks.fringes: interferogram, read_charge), as the whole-mask check")


def fringe_figure(acc: NearFieldBlocks, target, period_um: float, *, workers: int = 2):
    """The ``fringe_reading`` figures (the whole-mask check's keys, with the method and what the block average
    does) and the interferogram ``(intensity, x_um, y_um)`` for the report's image."""
    from metalay.checks import fringes

    fld, x, y = acc.field(period_um)
    bx, by = float(x[1] - x[0]), float(y[1] - y[0])
    tilt = fringes.default_tilt_deg(bx, target.wavelength_nm, samples_per_fringe=FRINGE_SAMPLES_PER_FRINGE)
    inten = fringes.interferogram(fld, x, y, wavelength_nm=target.wavelength_nm, tilt_deg=tilt)
    reading = fringes.read_charge(inten, x, y, center=target.center_um, workers=workers)
    charge = abs(int(target.charge or 0)) or 1
    step = float(charge * max(bx, by) / reading.radii_um.min()) if reading.radii_um.size else float("inf")
    resolved = step <= FRINGE_MAX_PHASE_RAD
    readable = reading.readable and resolved
    out = {"status": "read" if readable else "unreadable", "charge": reading.charge if readable else None,
           "design_charge": target.charge, "agrees": bool(readable and reading.charge == target.charge),
           "windings": reading.windings.tolist(), "loop_radii_um": reading.radii_um.tolist(),
           "loop_agreement": reading.agreement, "loop_tolerance_turns": fringes.LOOP_TOLERANCE_TURNS,
           "block_um": [bx, by], "block_cells": [acc.mx, acc.my], "grid": [acc.nx, acc.ny],
           "fringe_period_um": FRINGE_SAMPLES_PER_FRINGE * bx, "sites_outside_grid": acc.sites_out,
           "vortex_phase_across_block_rad": step, "max_phase_across_block_rad": FRINGE_MAX_PHASE_RAD,
           "method": FRINGE_METHOD.format(mx=acc.mx, my=acc.my, nx=acc.nx, ny=acc.ny, spf=FRINGE_SAMPLES_PER_FRINGE),
           "low_pass": "the block mean is a low-pass of the near field and the reading keeps the spectrum within "
                       "1 / (12 B) of the fringe carrier: the fork is resolved while the vortex phase across a "
                       "block on the innermost loop, max(|l|, 1) B / r_loop, is at most pi / 6; beyond, or when "
                       "the loops disagree, the reading is 'unreadable', never a number"}
    if not readable:
        out["reason"] = (f"the fork is not resolved by blocks of {bx:.3g} um (vortex phase across a block on the "
                         f"innermost loop {step:.2f} rad > pi / 6)" if not resolved
                         else "the loops around the core disagree")
    return out, (inten, x, y)


def rs_kernel(dx_um, dy_um, z_um: float, k_per_um: float):
    """Rayleigh-Sommerfeld (first kind) impulse response ``(z / rho) (1 / rho - i k) exp(i k rho) / (2 pi rho)``
    from a source point to a point offset by ``(dx, dy, z)`` (time dependence ``exp(-i omega t)``); also ``rho``."""
    rho = np.sqrt(dx_um * dx_um + dy_um * dy_um + z_um * z_um)
    return (z_um / rho) * (1 / rho - 1j * k_per_um) * np.exp(1j * k_per_um * rho) / (2 * np.pi * rho), rho


def focal_model_bound(delta_um, focal_um: float, k_per_um: float, sin_max: float):
    """Bound of ``|Q_s - exp(i k |D|^2 / 2f) exp(-i k n_s . D)|`` for every site (``Q_s = h(P0 + D - r_s) /
    h(P0 - r_s)``), ``|D| = delta_um``, ``|n_s| <= sin_max``, ``rho_0 >= f``.

    ``rho - rho_0 = -n.D + (|D|^2 - (n.D)^2) / (2 rho_0) + R`` with ``|R| <= |n.D| |D|^2 / (2 rho_0^2) +
    |D|^4 / (8 rho_0^3) + rho_0 t^3 / (16 (1 - t)^(5/2))``, ``t = 2 |D| / rho_0 + |D|^2 / rho_0^2`` (Lagrange
    remainder of ``sqrt(1 + t)``); the phase left after ``k |D|^2 / 2f`` is then at most
    ``psi = k (|D|^2 (1 - cos) / (2 f) + |D|^2 sin^2 / (2 f) + |R|) + |D| / (k (f - |D|)^2)`` (the last: the
    argument of ``1 / rho - i k``), the amplitude ratio is within ``alpha = (f / (f - |D|))^2 sqrt(1 + 1 / (k (f -
    |D|))^2) - 1`` of 1, and ``|Q - model| <= alpha + (1 + alpha) psi``. Valid for ``t < 1``.
    """
    d = np.asarray(delta_um, dtype=np.float64)
    f, k = float(focal_um), float(k_per_um)
    cos_max = math.sqrt(max(0.0, 1 - sin_max * sin_max))
    t = 2 * d / f + d * d / (f * f)
    rem = sin_max * d ** 3 / (2 * f * f) + d ** 4 / (8 * f ** 3) + f * t ** 3 / (16 * np.clip(1 - t, 1e-300, None)
                                                                                   ** 2.5)
    psi = k * (d * d * (1 - cos_max) / (2 * f) + d * d * sin_max ** 2 / (2 * f) + rem) + d / (k * (f - d) ** 2)
    alpha = (f / (f - d)) ** 2 * np.sqrt(1 + 1 / (k * (f - d)) ** 2) - 1
    out = alpha + (1 + alpha) * psi
    return np.where(t < 1, out, np.inf)


def lattice_phasor(decoded, u: float, v: float, k_per_um: float) -> np.ndarray:
    """``exp(-i k (u x_s + v y_s))`` at the lattice sites of ``decoded`` (complex128), as a product of a row table
    and a column table (two gathers instead of one complex exponential per site; the same site coordinates as
    :func:`metalay.checks.optics.site_xy`, to rounding)."""
    p = decoded.period_nm * 1e-3
    if decoded.i.size == 0:
        return np.zeros(0, np.complex128)
    if decoded.lattice == "square":
        hx, sx, sy = decoded.i, p, p
    else:
        hx, sx, sy = 2 * decoded.i + (decoded.j % 2), p / 2, p * math.sqrt(3) / 2
    h0, j0 = int(hx.min()), int(decoded.j.min())
    tx = np.exp(-1j * k_per_um * u * (np.arange(h0, int(hx.max()) + 1) * sx + decoded.origin_um[0]))
    ty = np.exp(-1j * k_per_um * v * (np.arange(j0, int(decoded.j.max()) + 1) * sy + decoded.origin_um[1]))
    return tx[hx - h0] * ty[decoded.j - j0]


# ----------------------------------------------------------------------------------------------------------------
# Wiring into the streamed check: which accumulators a target needs, what each chunk adds, the figures at the end
# ----------------------------------------------------------------------------------------------------------------

OAM_SECTORS = 256
"""Azimuthal sectors of the OAM sums (a power of two, more than four times the largest reported charge): the
order-1 bound is ``(|l| pi / 256)^2 / 2`` of the ring's amplitude sum, 6.8e-4 for charge 3, 7.5e-3 for charge 10
(a quarter of the scattered grid of 1024 sectors: about three times faster at 1e7 sites)."""
FOCAL_MAX_PHASE_RAD = 0.15
"""Largest ``phi`` of the focal block sums at the window's corners (order-1 bound ``0.15^2 / 2 = 1.1 %`` of
``sum |g_s|`` there, far less near the peak)."""
FOCAL_SAMPLES = 121
"""Focal-plane window samples per side (``+-3`` Airy radii), as the whole-mask check."""


def _linear_removal(target):
    """``(u, v)`` with ``phi_removed = k (u x + v y)`` when every removed term is a tilt, else None."""
    from metalay.design.phase import Tilt

    if not all(isinstance(t, Tilt) for t in target.remove_terms):
        return None
    u = sum(math.sin(math.radians(t.angle_deg)) * math.cos(math.radians(t.azimuth_deg)) for t in target.remove_terms)
    v = sum(math.sin(math.radians(t.angle_deg)) * math.sin(math.radians(t.azimuth_deg)) for t in target.remove_terms)
    return float(u), float(v)


def lens_geometry(target, n_sites: int, cell_area_um2: float) -> dict:
    """Designed focus ``P0``, aperture-equivalent diameter, numerical aperture, Airy radius ``0.61 lambda / NA``
    (in the lens medium) and the window half-width (3 Airy radii), as :func:`metalay.checks.optics.lens_metrics`."""
    f_um = float(target.focal_length_um)
    u0, v0 = target.direction
    w0 = math.sqrt(max(1e-12, 1 - u0 * u0 - v0 * v0))
    lam = target.wavelength_nm * 1e-3 / target.lens_medium_index
    diameter = 2 * math.sqrt(max(n_sites, 1) * cell_area_um2 / math.pi)
    na = math.sin(math.atan(diameter / (2 * f_um)))
    r0 = 0.61 * lam / na
    return {"focus_um": (f_um * u0 / w0, f_um * v0 / w0), "focal_um": f_um, "diameter_um": diameter, "na": na,
            "lam_um": lam, "k": 2 * math.pi / lam, "airy_um": r0, "half_um": 3.0 * r0}


def make_extras(target, n_estimate: int, period_um: float, cell_area_um2: float, max_side: int, *,
                lattice: str = "square", half_extent_um=None) -> dict:
    """The accumulators a target needs beyond the spots: "oam" and "fringe" (axis charge; the fringe grid covers
    ``half_extent_um``, default the disk of ``n_estimate`` cells), "channels" (multiplexed), "lens" (a focal
    length: measured and ideal focal block sums)."""
    from metalay.checks.optics_stream import FarFieldAccumulator

    extras = {}
    if target.charge is not None:
        lmax = max(abs(int(target.charge)), 10)
        sectors = max(OAM_SECTORS, 1 << int(math.ceil(math.log2(4 * lmax + 1))))
        extras["oam"] = OamAccumulator(period_um, sectors, tuple(map(float, target.center_um)))
        if half_extent_um is None:
            half_extent_um = (math.sqrt(max(n_estimate, 1) * cell_area_um2 / math.pi),) * 2
        extras["fringe"] = fringe_blocks(tuple(map(float, target.center_um)), half_extent_um, period_um, lattice,
                                         target.wavelength_nm, max_blocks=FRINGE_MAX_BLOCKS)
    if target.channels:
        extras["channels"] = ChannelAccumulator(tuple(target.channels), target.wavelength_nm)
    if target.focal_length_um:
        geo = lens_geometry(target, n_estimate, cell_area_um2)
        u_max = 2 * geo["half_um"] / geo["focal_um"]
        sin_est = math.sin(math.atan((geo["diameter_um"] / 2 + math.hypot(*geo["focus_um"])) / geo["focal_um"]))
        block = max(FOCAL_MAX_PHASE_RAD * geo["lam_um"] / (math.pi * u_max),
                    2.2 * geo["focal_um"] * sin_est / max_side)
        lam_nm = geo["lam_um"] * 1e3
        extras["lens"] = {"geo": geo, "sin_max": 0.0, "acc": FarFieldAccumulator(block, lam_nm, 1),
                          "ideal": FarFieldAccumulator(block, lam_nm, 1)}
    return extras


def add_extras(extras: dict, decoded, x_um, y_um, fields, target, cell_area_um2: float, phasor) -> None:
    """Add one chunk's sites (beam frame) to the extra accumulators; ``phasor(u, v)`` gives the chunk's
    ``exp(-i k (u x + v y))`` (:func:`lattice_phasor`, shared with the spot accumulators)."""
    from metalay.checks.optics import _target_phase

    if "oam" in extras:
        g = fields.converted.astype(np.complex128)
        if target.remove_terms:
            lin = _linear_removal(target)
            g *= (phasor(*lin) if lin is not None
                  else np.exp(-1j * _target_phase(target.remove_terms, x_um, y_um, target)))
        extras["oam"].add(x_um, y_um, g)
        if "fringe" in extras:
            extras["fringe"].add(decoded, g)
    if "channels" in extras:
        acc = extras["channels"]
        phasors = np.stack([phasor(u, v) for _, u, v in acc.channels], axis=1)
        acc.add(x_um, y_um, fields.designed, phasors)
    if "lens" in extras:
        _add_lens(extras["lens"], x_um, y_um, fields, target, cell_area_um2)


def _add_lens(lens: dict, x_um, y_um, fields, target, cell_area_um2: float) -> None:
    """Sites times the kernel to the designed focus, placed at ``f n_s``; measured and ideal (``|converted|``
    with the exact design phase, as the whole-mask check's Strehl reference)."""
    from metalay.checks.optics import _target_phase
    from metalay.checks.optics_stream import block_coords

    geo = lens["geo"]
    cx, cy = geo["focus_um"]
    f_um = geo["focal_um"]
    h, rho = rs_kernel(cx - x_um, cy - y_um, f_um, geo["k"])
    h *= cell_area_um2
    nx, ny = (x_um - cx) / rho, (y_um - cy) / rho
    lens["sin_max"] = max(lens["sin_max"], float(np.sqrt(nx * nx + ny * ny).max()))
    xs, ys = f_um * nx, f_um * ny
    blocks = block_coords(xs, ys, lens["acc"].block_um)
    lens["acc"].add(xs, ys, fields.designed * h, blocks=blocks)
    ideal = np.abs(fields.converted) * np.exp(1j * _target_phase(target.terms, x_um, y_um, target))
    lens["ideal"].add(xs, ys, ideal * h, blocks=blocks)


OAM_METHOD = ("ring x sector sums of the converted field about the beam axis (tilt/lens/axicon terms removed per "
              "site), rings one period wide, {sectors} sectors with first angular moments; P_l = sum_k |H_kl|^2 / N_k "
              "over whole rings within the radius, weights over sum |g_s|^2 there")
OAM_BOUND = ("|H_kl - sum_ring g_s exp(-i l phi_s)| <= A_k (|l| delta)^2 / 2 + 1e-12 A_k (A_k = sqrt(N_k "
             "sum_ring |g_s|^2) >= sum_ring |g_s|, "
             "delta = largest angular offset from the sector centre <= pi / sectors); weight bound "
             "sum_k e (2 |H_kl| + e) / N_k / sum |g_s|^2: against the ring quadrature of the site sums, not against "
             "the whole-mask check's interpolated polar grid")


def oam_figure(acc: OamAccumulator, target, diameter_um: float, period_um: float, charges=range(-10, 11)) -> dict:
    """The ``oam`` figures (as the whole-mask check's, with bounds and the method)."""
    sp = acc.spectrum(diameter_um / 2 - 1.5 * period_um, charges)
    ch, w, b = sp["charges"], sp["weights"], sp["bounds"]
    hit = np.flatnonzero(ch == int(target.charge))
    total = float(w.sum())
    return {"about": "beam axis (non-vortex terms removed)", "charges": ch.tolist(), "weights": w.tolist(),
            "weight_bounds": b.tolist(), "design_charge": target.charge,
            "purity": float(w[hit[0]]) if hit.size else 0.0, "purity_bound": float(b[hit[0]]) if hit.size else 0.0,
            "radius_um": sp["radius_um"], "rings": sp["rings"], "sectors": acc.n_sectors,
            "sector_offset_rad": acc.reach_rad,
            "mean_charge": float(np.dot(ch, w) / total) if total > 0 else 0.0,
            "method": OAM_METHOD.format(sectors=acc.n_sectors), "error_bound": OAM_BOUND}


def crosstalk_figure(acc: ChannelAccumulator) -> dict:
    """The ``crosstalk`` figures from the exact site sums (spot positions are not measured when streaming)."""
    from metalay.checks.optics import isolation_figures

    out = isolation_figures(acc.matrix())
    out.update({"positions": None, "design_positions": [[u, v] for _, u, v in acc.channels],
                "charges": [int(ch[0]) for ch in acc.channels],
                "method": "spot values: direct Fraunhofer sum over the elements at each channel direction with each "
                          "conjugate-vortex probe, summed chunk by chunk (the whole-mask check's sum); spot positions "
                          "not measured when streaming",
                "error_bound": "exact site sums: floating-point rounding only (complex128)"})
    return out


LENS_METHOD = ("Rayleigh-Sommerfeld focal field at {n} x {n} points within 3 Airy radii of the designed focus: each "
               "site times the kernel to the focus, placed at f n_s (n_s its direction from the focus), block sums "
               "of side {block:.4g} um with first moments, a far field in Delta / f; measured (designed "
               "polarisation) and ideal (|converted| with the exact design phase) fields")
LENS_BOUND = ("|U_B - U| <= block bound (A phi^2 / 2, as the spots) + A (alpha + (1 + alpha) psi) (second-order "
              "expansion of rho about the focus, amplitude ratio; A = sum |g_s|); intensity bounds eps (2 |U_B| + "
              "eps); strehl_bound from the peak and ideal-peak intervals")


def _window_bounds(ff, geo: dict, sin_max: float, xs, ys):
    cx, cy = geo["focus_um"]
    dd = np.hypot(xs[None, :] - cx, ys[:, None] - cy)
    return ff.bound + ff.amplitude_sum * focal_model_bound(dd, geo["focal_um"], geo["k"], sin_max)


def lens_figure(lens: dict, target, n_sites: int, cell_area_um2: float) -> dict:
    """The ``lens`` figures (as :func:`metalay.checks.optics.lens_metrics`) with bounds and the method."""
    from metalay.checks.optics import focal_spot_figures

    geo = lens_geometry(target, n_sites, cell_area_um2)
    m = (FOCAL_SAMPLES - 1) // 2
    step = geo["half_um"] / m
    f_um = geo["focal_um"]
    ff = lens["acc"].window(0.0, 0.0, step / f_um, step / f_um, m)
    fi = lens["ideal"].window(0.0, 0.0, step / f_um, step / f_um, m)
    xs, ys = geo["focus_um"][0] + f_um * ff.u, geo["focus_um"][1] + f_um * ff.v
    eps, eps_i = (_window_bounds(w, geo, lens["sin_max"], xs, ys) for w in (ff, fi))
    a, a_i = np.abs(ff.field), np.abs(fi.field)
    area = n_sites * cell_area_um2
    out = focal_spot_figures(a * a, xs, ys, lam_medium_um=geo["lam_um"], numerical_aperture=geo["na"],
                             area_um2=area)
    peak_hi, peak_lo = float(((a + eps) ** 2).max()), float((np.maximum(a - eps, 0) ** 2).max())
    ideal_hi, ideal_lo = float(((a_i + eps_i) ** 2).max()), float((np.maximum(a_i - eps_i, 0) ** 2).max())
    strehl = out["peak_intensity"] / float((a_i * a_i).max())
    lo, hi = peak_lo / ideal_hi, peak_hi / max(ideal_lo, 1e-300)
    r, c = np.unravel_index(np.argmax(a), a.shape)
    inside = np.hypot(xs[None, :] - xs[c], ys[:, None] - ys[r]) < 1.5 * (out["fwhm_x_um"] + out["fwhm_y_um"])
    out.update({"strehl": strehl, "strehl_bound": max(hi - strehl, strehl - lo),
                "focusing_efficiency_bound": float((eps * (2 * a + eps))[inside].sum() * step * step / area),
                "relative_field_bound_at_peak": float(eps[r, c] / max(a[r, c], 1e-300)),
                "diameter_um": geo["diameter_um"], "focal_length_um": f_um, "designed_focus_um": list(geo["focus_um"]),
                "largest_sin_from_focus": lens["sin_max"],
                "method": LENS_METHOD.format(n=FOCAL_SAMPLES, block=lens["acc"].block_um), "error_bound": LENS_BOUND})
    out["profile"] = out.pop("profile")
    lens["windows"] = {"focal_plane": ff, "focal_plane_ideal": fi}
    return out
