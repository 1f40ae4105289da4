"""Optical check of a mask too large to hold: a far field accumulated tile by tile from block sums, with a bound.

The mask is read as a stream of polygon chunks (:func:`metalay.io.stream_read.iter_mask_chunks`); each chunk is
decoded (:func:`metalay.checks.decode.decode_sites`), turned into per-site output fields with the same Jones algebra
as the whole-mask check (:func:`metalay.checks.optics.site_fields`), and each site's complex field ``f_s`` of the
designed polarisation is added to a coarse grid of square blocks of side ``B`` (the block sum ``S_b``, and for
the first-order correction the moments ``Mx_b = sum f_s dx_s``, ``My_b = sum f_s dy_s`` with ``d_s`` the site's
offset from its block centre ``X_b``). Only the coarse grid is kept; the power budget is summed exactly.

Far field (Fraunhofer; time dependence ``exp(-i omega t)``), in direction cosines ``(u, v)``::

    E(u, v)     = sum_s f_s exp(-i k (x_s u + y_s v)),                 k = 2 pi / wavelength   (the site sum)
    E_B(u, v)   = sum_b exp(-i k X_b . u) [S_b - i k (u Mx_b + v My_b)]                     (order 1; order 0: S_b)

evaluated by a matrix DFT of the block grid on a small window of directions about each measured spot (steps
``wavelength / (pad x grid extent)``, as a padded FFT would sample). Each spot has its own accumulator whose sites
are demodulated by the spot's direction ``(u_c, v_c)`` (``f_s exp(-i k (u_c x_s + v_c y_s))``), so ``u`` below is
measured from the spot and the block side is limited by the lobe's width, not by the deflection angle.

Error bound (derived here). Each site's term differs by ``f_s exp(-i k X_b.u) (exp(-i phi_s) - 1 [+ i phi_s])``
with ``phi_s = k (dx_s u + dy_s v)``, ``|dx_s| <= dx, |dy_s| <= dy`` (the largest offsets met, at most ``B/2``),
so ``|phi_s| <= phi(u, v) = k (dx |u| + dy |v|) <= pi B (|u| + |v|) / wavelength``. With
``|exp(-i phi) - 1| <= min(|phi|, 2)`` and ``|exp(-i phi) - 1 + i phi| <= phi^2 / 2`` (Taylor remainder of the
exponential)::

    |E_B(u, v) - E(u, v)| <= A * min(phi, 2)    (order 0)        A = sum_s |f_s|
    |E_B(u, v) - E(u, v)| <= A * phi^2 / 2      (order 1)

plus a floating-point allowance of ``1e-12 A``. A power ``P = sum_D |E|^2 du dv`` over a disk ``D`` of samples
then differs by at most ``sum_D eps (2 |E_B| + eps) du dv``. Powers are fractions of the power incident on the
sites: ``A_cell / wavelength^2`` per ``du dv`` (Parseval for a lattice sum over its Brillouin zone). As in the
whole-mask check, each cell radiates as a uniformly filled cell (square: ``p x p``; hexagonal: the equal-area
``p x p sqrt(3)/2`` brick): field and bound are multiplied by its aperture factor ``sinc(wx u / wavelength)
sinc(wy v / wavelength)`` (``|factor| <= 1``).

References
----------
Goodman 2005, Introduction to Fourier Optics, 3rd ed., ch. 4 (Fraunhofer diffraction: the far field is the
Fourier transform of the aperture field).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from metalay.checks.optics import (
    SAFETY_NOTE,
    OpticsTarget,
    beam_frame_sites,
    facing_of,
    ideal_responses,
    input_jones,
    json_ready,
    optics_verdicts,
    site_fields,
    site_xy,
    spot_centres,
    target_from_design,
)
from metalay.errors import MetalayError

__all__ = ["BlockFarField", "FarFieldAccumulator", "StreamedOptics", "check_optics_streamed", "block_size_for",
           "compile_check_streamed", "write_streamed_outputs", "phase_bound", "disk_power", "prefetch",
           "hash_in_background", "block_coords",
           "OPTICS_STREAM_BYTES_PER_SITE"]

OPTICS_STREAM_BYTES_PER_SITE = 12
"""Bytes per polygon the streamed optical check still holds for a flat GDSII (the file walk's per-element table);
the rest is two or three chunks (one read ahead) and the coarse grids (spots, OAM rings x sectors, fringe blocks,
focal plane)."""
_FP_ALLOWANCE = 1e-12


@dataclass(frozen=True, eq=False)
class BlockFarField:
    """Far field of block sums on a window of directions, with its error bound against the exact site sum.

    Attributes
    ----------
    u, v : ndarray (nu,), (nv,)
        Direction cosines of the samples (ascending, the window's centre in the middle).
    field : ndarray (nv, nu) complex128
        ``E_B(u, v)`` in units of one cell's field amplitude.
    bound : ndarray (nv, nu) float64
        ``|E_B - E| <=`` this, per sample (module docstring).
    amplitude_sum : float
        ``A = sum_s |f_s|``.
    block_um : float
        Block side ``B``.
    order : int
        0 (block sums) or 1 (with first moments).
    wavelength_nm : float
    reach_um : (float, float)
        Largest offsets ``(dx, dy)`` of a site from its block centre (``<= B/2``), used by the bound.
    carrier : (float, float)
        Direction the sites were demodulated by; the bound grows with the distance from it.
    """

    u: np.ndarray
    v: np.ndarray
    field: np.ndarray
    bound: np.ndarray
    amplitude_sum: float
    block_um: float
    order: int
    wavelength_nm: float
    reach_um: tuple = (0.0, 0.0)
    carrier: tuple = (0.0, 0.0)

    @property
    def du(self) -> float:
        return float(self.u[1] - self.u[0]) if self.u.size > 1 else 0.0

    @property
    def dv(self) -> float:
        return float(self.v[1] - self.v[0]) if self.v.size > 1 else 0.0


def phase_bound(u, v, reach_x_um: float, reach_y_um: float, wavelength_nm: float, order: int,
                amplitude_sum: float):
    """``A min(phi, 2)`` (order 0) or ``A phi^2 / 2`` (order 1), plus ``1e-12 A`` for floating point.

    ``phi = 2 pi (dx |u| + dy |v|) / wavelength`` with ``dx, dy`` the largest offsets of a site from its block
    centre (at most ``B/2``, which gives ``pi B (|u| + |v|) / wavelength``).
    """
    phi = 2 * math.pi * (reach_x_um * np.abs(u) + reach_y_um * np.abs(v)) / (wavelength_nm * 1e-3)
    rel = np.minimum(phi, 2.0) if order == 0 else phi * phi / 2
    return amplitude_sum * (rel + _FP_ALLOWANCE)


@dataclass(eq=False)
class FarFieldAccumulator:
    """Block sums ``S_b`` (and moments) of site fields, on a coarse grid that grows as tiles arrive.

    Blocks are centred on multiples of ``B`` about the mask origin: block ``(iy, ix)`` has centre ``(ix B, iy B)``
    and covers ``[(ix - 1/2) B, (ix + 1/2) B) x [(iy - 1/2) B, (iy + 1/2) B)`` (so with ``B`` an odd number of
    square-lattice periods every site of a lattice through the origin sits on a block centre row or column).
    """

    block_um: float
    wavelength_nm: float
    order: int = 1
    ix0: int = 0
    iy0: int = 0
    grids: list = field(default_factory=list)  # S, then Mx, My for order 1; complex128 (ny, nx)
    amplitude_sum: float = 0.0
    sites: int = 0
    reach_x_um: float = 0.0  # largest |x_s - X_b| seen (<= B/2)
    reach_y_um: float = 0.0
    carrier: tuple = (0.0, 0.0)  # (u_c, v_c): sites are demodulated by exp(-i k (u_c x + v_c y))
    max_side: int = 0  # > 0: blocks are merged 3 x 3 whenever the grid would grow beyond this many per side

    def __post_init__(self):
        if self.order not in (0, 1):
            raise MetalayError(f"order = {self.order!r}; allowed: 0, 1")
        if not self.block_um > 0:
            raise MetalayError(f"block_um = {self.block_um!r}; allowed: > 0")

    def _span(self, bx: np.ndarray, by: np.ndarray) -> tuple[int, int, int, int]:
        """Block indices ``(lo_x, hi_x, lo_y, hi_y)`` spanning the grid held so far and the blocks ``bx, by``."""
        lo_x, hi_x, lo_y, hi_y = int(bx.min()), int(bx.max()), int(by.min()), int(by.max())
        if self.grids:
            ny, nx = self.grids[0].shape
            lo_x, lo_y = min(lo_x, self.ix0), min(lo_y, self.iy0)
            hi_x, hi_y = max(hi_x, self.ix0 + nx - 1), max(hi_y, self.iy0 + ny - 1)
        return lo_x, hi_x, lo_y, hi_y

    def _side_after(self, bx: np.ndarray, by: np.ndarray) -> int:
        lo_x, hi_x, lo_y, hi_y = self._span(bx, by)
        return max(hi_x - lo_x, hi_y - lo_y) + 1

    def _coarsen(self, m: int = 3) -> None:
        """Merge ``m x m`` blocks (``m`` odd: the new centres are multiples of the new side ``m B``); sums add and
        moments shift exactly (``M' = sum (M + S (X_b - X'))``); offsets grow by at most ``(m - 1) B / 2``."""
        b = self.block_um
        if self.grids:
            ny, nx = self.grids[0].shape
            ix, iy = self.ix0 + np.arange(nx), self.iy0 + np.arange(ny)
            jx, jy = (ix + m // 2) // m, (iy + m // 2) // m
            nx2, ny2 = int(jx[-1] - jx[0] + 1), int(jy[-1] - jy[0] + 1)
            idx = ((jy - jy[0])[:, None] * nx2 + (jx - jx[0])[None, :]).ravel()
            ox = np.broadcast_to(((ix - jx * m) * b)[None, :], (ny, nx)).ravel()
            oy = np.broadcast_to(((iy - jy * m) * b)[:, None], (ny, nx)).ravel()
            old = [g.ravel() for g in self.grids]
            parts = [old[0]] + ([old[1] + old[0] * ox, old[2] + old[0] * oy] if self.order == 1 else [])

            def merge(w):
                return (np.bincount(idx, w.real, nx2 * ny2) + 1j * np.bincount(idx, w.imag, nx2 * ny2)).reshape(
                    ny2, nx2)

            self.grids = [merge(w) for w in parts]
            self.ix0, self.iy0 = int(jx[0]), int(jy[0])
        self.reach_x_um += (m // 2) * b
        self.reach_y_um += (m // 2) * b
        self.block_um = b * m

    def _grow(self, bx: np.ndarray, by: np.ndarray) -> None:
        lo_x, hi_x, lo_y, hi_y = self._span(bx, by)
        if self.grids and (lo_x, lo_y, hi_x - lo_x + 1, hi_y - lo_y + 1) == (self.ix0, self.iy0,
                                                                           *self.grids[0].shape[::-1]):
            return
        new = [np.zeros((hi_y - lo_y + 1, hi_x - lo_x + 1), np.complex128) for _ in range(1 + 2 * self.order)]
        for g_new, g_old in zip(new, self.grids):
            ny, nx = g_old.shape
            g_new[self.iy0 - lo_y:self.iy0 - lo_y + ny, self.ix0 - lo_x:self.ix0 - lo_x + nx] = g_old
        self.grids, self.ix0, self.iy0 = new, lo_x, lo_y

    def add(self, x_um: np.ndarray, y_um: np.ndarray, f: np.ndarray, *, blocks=None, phasor=None,
            amplitude_sum: float | None = None) -> None:
        """Add sites at ``(x_um, y_um)`` with complex fields ``f`` (shape (S,)).

        ``blocks``: :func:`block_coords` of the sites for this block side (shared between accumulators);
        ``phasor``: the carrier factor ``exp(-i k (u_c x + v_c y))`` of the sites (e.g. from lattice tables);
        ``amplitude_sum``: ``sum |f|`` when known. Each is computed here when not given.
        """
        if np.size(f) == 0:
            return
        if blocks is None or blocks[0] != self.block_um:
            blocks = block_coords(x_um, y_um, self.block_um)
        while self.max_side and self._side_after(blocks[1], blocks[2]) > self.max_side:
            self._coarsen(3)
            blocks = block_coords(x_um, y_um, self.block_um)
        _, bx, by, dx, dy = blocks
        self._grow(bx, by)
        ny, nx = self.grids[0].shape
        idx = (by - self.iy0) * nx + (bx - self.ix0)
        if self.carrier != (0.0, 0.0):
            if phasor is None:
                k = 2 * np.pi / (self.wavelength_nm * 1e-3)
                phasor = np.exp(-1j * k * (self.carrier[0] * x_um + self.carrier[1] * y_um))
            f = f * phasor
        f = np.asarray(f, np.complex128)
        self.reach_x_um = max(self.reach_x_um, float(np.abs(dx).max()))
        self.reach_y_um = max(self.reach_y_um, float(np.abs(dy).max()))
        weights = [f, f * dx, f * dy] if self.order == 1 else [f]
        # runs of consecutive sites in one block (sites come row by row): summed first, then scattered
        starts = np.concatenate([[0], np.flatnonzero(idx[1:] != idx[:-1]) + 1])
        at = idx[starts]
        lo = int(at.min())
        for g, w in zip(self.grids, weights):
            col = np.add.reduceat(w, starts)
            flat = g.reshape(-1)
            part_re = np.bincount(at - lo, col.real)
            flat.real[lo:lo + part_re.size] += part_re
            flat.imag[lo:lo + part_re.size] += np.bincount(at - lo, col.imag)
        self.amplitude_sum += amplitude_of(f) if amplitude_sum is None else float(amplitude_sum)
        self.sites += int(f.size)

    @property
    def extent_um(self) -> tuple[float, float]:
        """Width and height of the block grid (``nx B``, ``ny B``)."""
        ny, nx = self.grids[0].shape
        return nx * self.block_um, ny * self.block_um

    def window(self, u0: float, v0: float, du: float, dv: float, half: int, *,
               cell_um: tuple | None = None) -> BlockFarField:
        """``E_B`` on a ``(2 half + 1)^2`` window of directions about ``(u0, v0)`` (steps ``du``, ``dv``), by a
        matrix DFT of the block grid (no FFT padding), with the per-sample bound.

        ``cell_um = (wx, wy)``: multiply field and bound by the cell-aperture factor ``sinc(wx u / wavelength)
        sinc(wy v / wavelength)`` of a uniformly filled ``wx x wy`` cell (as the whole-mask check does; ``|factor|
        <= 1``, so the bound scales with it); None: point sites.
        """
        if not self.grids:
            raise MetalayError("optics: the mask has no decoded structures to illuminate")
        ny, nx = self.grids[0].shape
        b, lam_um = self.block_um, self.wavelength_nm * 1e-3
        k = 2 * np.pi / lam_um
        u = u0 + du * np.arange(-half, half + 1)
        v = v0 + dv * np.arange(-half, half + 1)
        up, vp = u - self.carrier[0], v - self.carrier[1]  # directions relative to the carrier
        ax = np.exp(-1j * k * np.outer((self.ix0 + np.arange(nx)) * b, up))  # (nx, nu)
        ay = np.exp(-1j * k * np.outer(vp, (self.iy0 + np.arange(ny)) * b))  # (nv, ny)

        def dft(g):
            return ay @ g @ ax

        e = dft(self.grids[0])
        if self.order == 1:
            e -= 1j * k * (up[None, :] * dft(self.grids[1]) + vp[:, None] * dft(self.grids[2]))
        bound = phase_bound(up[None, :], vp[:, None], self.reach_x_um, self.reach_y_um, self.wavelength_nm,
                            self.order, self.amplitude_sum)
        if cell_um is not None:
            factor = np.outer(np.sinc(cell_um[1] * v / lam_um), np.sinc(cell_um[0] * u / lam_um))
            e *= factor
            bound = bound * np.abs(factor)
        return BlockFarField(u, v, e, bound, self.amplitude_sum, b, self.order, self.wavelength_nm,
                             (self.reach_x_um, self.reach_y_um), tuple(self.carrier))


def amplitude_of(f: np.ndarray) -> float:
    """``sum |f_s|`` in float64 (``sqrt(re^2 + im^2)``, vectorised; ``np.abs`` of complex numbers is slower)."""
    v = np.asarray(f).view(np.float32 if np.asarray(f).dtype == np.complex64 else np.float64).reshape(-1, 2)
    re, im = v[:, 0].astype(np.float64), v[:, 1].astype(np.float64)
    return float(np.sqrt(re * re + im * im).sum())


def power_of(f: np.ndarray) -> float:
    """``sum |f_s|^2`` in float64 (a dot product of the real and imaginary parts)."""
    v = np.asarray(f).view(np.float32 if np.asarray(f).dtype == np.complex64 else np.float64).astype(np.float64)
    return float(v @ v)


def block_coords(x_um: np.ndarray, y_um: np.ndarray, block_um: float):
    """``(B, bx, by, dx, dy)``: the side, block indices (centres ``(bx B, by B)``) of sites and their offsets."""
    bx = np.floor(x_um / block_um + 0.5).astype(np.int64)
    by = np.floor(y_um / block_um + 0.5).astype(np.int64)
    return block_um, bx, by, x_um - bx * block_um, y_um - by * block_um


def disk_power(ff: BlockFarField, u0: float, v0: float, radius_u: float, norm: float) -> tuple[float, float]:
    """Power in the disk about ``(u0, v0)`` (``norm`` per ``|E|^2``) and its bound ``sum eps (2|E_B| + eps)``."""
    inside = (ff.u[None, :] - u0) ** 2 + (ff.v[:, None] - v0) ** 2 < radius_u ** 2
    a = np.abs(ff.field[inside])
    eps = ff.bound[inside]
    return float((a * a).sum() * norm), float((eps * (2 * a + eps)).sum() * norm)


def block_size_for(period_nm: float, wavelength_nm: float, u_max: float, side_sites: float, *,
                   max_phase_rad: float = 0.25, max_side: int = 4096) -> float:
    """Block side (um, a whole number of periods) for a far field needed up to ``|u| + |v| <= u_max``.

    The largest block with ``phi(u_max) <= max_phase_rad`` (so the order-1 bound is at most
    ``max_phase_rad^2 / 2`` of ``A``), at most an eighth of the aperture, and at least ``side_sites / max_side``
    periods (a grid of at most ``max_side`` blocks per side).
    """
    p_um = period_nm * 1e-3
    by_phase = max_phase_rad * wavelength_nm * 1e-3 / (math.pi * u_max) if u_max > 0 else math.inf
    m = max(1, min(int(min(by_phase, 1e9) // p_um), int(side_sites // 8)), int(math.ceil(side_sites / max_side)))
    return m * p_um


@dataclass(frozen=True, eq=False)
class StreamedOptics:
    """Result of :func:`check_optics_streamed`: JSON-ready figures (with the bound and the method), the far-field
    window of each measured spot (name -> :class:`BlockFarField`; a lens adds "focal_plane" and
    "focal_plane_ideal", whose ``u, v`` are focal-plane offsets over the focal length), notes, timings and the
    simulated fork interferogram (designs with an axis charge)."""

    figures: dict
    far: dict
    notes: tuple
    timings: dict
    fringe_image: tuple | None = None  # (intensity (ny, nx), x_um (nx,), y_um (ny,)) of the fork interferogram


def _responses(lib, wl: float, bias_nm: float, notes: list, design=None):
    """Responses per library cell at ``wl``; a biased mask's cells at their size as written (as the whole-mask
    check does, for every cell of the library: which cells the mask uses is known only after the stream)."""
    from metalay.checks.optics import OpticsOptions, _biased_responses

    if lib.has_responses:
        t_long, t_short = lib.response_at(wl)
        notes.append(f"cell responses from library {lib.name} at {wl:g} nm")
        if bias_nm:
            every = type("AllCells", (), {"cell": np.arange(len(lib.cells))})()
            t_long, t_short, _ = _biased_responses(lib, t_long, t_short, every, bias_nm, notes, wavelength_nm=wl,
                                                   opt=OpticsOptions(), design=design)
    else:
        t_long, t_short = ideal_responses(len(lib.cells))
        notes.append(f"library {lib.name} has no optical responses: ideal half-wave cells assumed")
    return np.asarray(t_long), np.asarray(t_short)


def _stream_sites(chunks, lib, setup: dict, accs: dict, extras: dict, notes: list, *, read_ahead: bool = True):
    """Decode each chunk and add its sites to every accumulator; the exact power sums and decode statistics.

    With ``read_ahead`` the next chunk is read by a thread while this one is decoded and summed (:func:`prefetch`;
    in order, so the sums are the same). Decoding in a third thread as well was measured: no gain on the shared
    machine (CPU time equal to wall time) for about 90 MB more at 1e7 sites."""
    target = setup["target"]
    t_long, t_short = _responses(lib, target.wavelength_nm, setup["bias_nm"], notes, setup.get("design"))
    jin = input_jones(setup["polarization"], design_sigma=target.sigma)
    sums = dict.fromkeys(("designed", "other", "converted", "leaked"), 0.0)
    stats = {"polygons": 0, "sites": 0, "unmatched": 0, "off_lattice": 0, "duplicates_within_chunks": 0,
             "max_size_error_nm": 0.0}
    reader = prefetch(chunks) if read_ahead else iter(chunks)
    try:
        for dec, sf in _decoded_chunks(reader, lib, setup, t_long, t_short, jin):
            _add_chunk(dec, sf, accs, extras, setup, sums)
            st = dec.stats
            for key in ("polygons", "sites", "unmatched", "off_lattice"):
                stats[key] += int(st.get(key, 0))
            stats["duplicates_within_chunks"] += int(st.get("duplicates", 0))
            stats["max_size_error_nm"] = max(stats["max_size_error_nm"], float(st.get("max_size_error_nm", 0.0)))
    finally:  # a decoding error mid-stream stops the reader thread at once
        if read_ahead:
            reader.close()
    return sums, stats


def _decoded_chunks(chunks, lib, setup: dict, t_long, t_short, jin):
    """Each chunk with structures decoded, in the beam frame, with its site fields: ``(DecodedSites, SiteFields)``."""
    from metalay.checks.decode import decode_sites

    layer = tuple(setup["layer"])
    first = 0  # index of the chunk's first polygon in the file's stream
    for ch in chunks:
        count = int(ch.layer.size)
        first += count
        if not np.any((ch.layer == layer[0]) & (ch.datatype == layer[1])):
            continue
        try:
            dec = decode_sites(ch, lib.cells, period_nm=setup["period_nm"], lattice=setup["lattice"], layer=layer,
                               bias_nm=setup["bias_nm"], size_tol_nm=setup["size_tol_nm"],
                               unmatched=setup["unmatched"], where=setup["where"])
        except MetalayError as exc:
            if str(exc).startswith(setup["where"]):
                raise
            raise MetalayError(f"{setup['where']}: polygons {first - count}-{first - 1} (read in chunks; the index "
                               f"below counts within them): {exc}") from exc
        dec = beam_frame_sites(dec, setup["facing"])
        yield dec, site_fields(t_long[dec.cell], t_short[dec.cell], dec.rotation_rad, jin,
                               sigma=setup["target"].sigma)


def _add_chunk(dec, sf, accs: dict, extras: dict, setup: dict, sums: dict) -> None:
    """One chunk's sites into the spot accumulators (shared block indices, carriers from lattice tables), the
    extra accumulators and the exact power sums."""
    from metalay.checks._stream_figures import add_extras, lattice_phasor

    x, y = site_xy(dec)
    k = 2 * np.pi / (setup["target"].wavelength_nm * 1e-3)
    phasors: dict = {}  # (u, v) -> exp(-i k (u x + v y)) of this chunk, shared by the spots and the OAM removal

    def phasor(u, v):
        if (u, v) not in phasors:
            phasors[u, v] = lattice_phasor(dec, u, v, k)
        return phasors[u, v]

    if accs:
        blocks = block_coords(x, y, next(iter(accs.values())).block_um)
        a_sum = amplitude_of(sf.designed)
        for acc in accs.values():
            ph = None if acc.carrier == (0.0, 0.0) else phasor(*acc.carrier)
            acc.add(x, y, sf.designed, blocks=blocks, phasor=ph, amplitude_sum=a_sum)
    add_extras(extras, dec, x, y, sf, setup["target"], setup["cell"][0] * setup["cell"][1], phasor)
    for key, arr in (("designed", sf.designed), ("other", sf.other), ("converted", sf.converted)):
        sums[key] += power_of(arr)
    sums["leaked"] += float(np.sum(sf.leaked_power, dtype=np.float64))


def prefetch(chunks, depth: int = 1):
    """Iterate ``chunks`` read ahead by a thread (at most ``depth`` waiting): the reader's numpy work overlaps the
    decoding and summing of the previous chunk on the second core. Order and values are the reader's; its errors
    are raised here; leaving early stops the thread."""
    import queue
    import threading

    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    done = object()

    def put(item) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def run():
        try:
            for ch in chunks:
                if not put(ch):
                    return
            put(done)
        except BaseException as exc:  # handed to the consumer, raised there
            put(exc)

    worker = threading.Thread(target=run, name="mask-reader", daemon=True)
    worker.start()
    try:
        while (item := q.get()) is not done:
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        worker.join()


def _budget(sums: dict, n: int) -> dict:
    if n <= 0:
        raise MetalayError("optics: the mask has no decoded structures to illuminate")
    d, o = sums["designed"], sums["other"]
    return {"converted": sums["converted"] / n, "leakage": sums["leaked"] / n, "designed_polarization": d / n,
            "other_polarization": o / n, "zeroth_order_total": (d + o) / n,
            "not_in_zeroth_order": max(0.0, 1.0 - (d + o) / n), "empty_cells": 0.0, "illuminated_cells": float(n)}


def _size_estimate(mask_path, design, st: dict, count_polygons) -> tuple[int, float]:
    """Sites expected and the aperture's side in periods, which size the blocks: from the design's aperture (no
    pass over the file; a mask larger than that merges blocks as it streams, see ``max_side``), else counted."""
    if design is not None:
        from metalay.design.lattice import estimated_sites

        n = estimated_sites(design.aperture, design.lattice)
        return max(1, int(round(n))), 2 * max(design.aperture.half_extent_um) / (st["period_nm"] * 1e-3)
    n_poly, _ = count_polygons(mask_path, layers=[st["layer"]])
    return n_poly, 2 * math.sqrt(max(n_poly, 1) / math.pi)


def _lobe_radius(target: OpticsTarget, n: int, cell_area_um2: float) -> tuple[float, float]:
    """Aperture-equivalent diameter (um) and lobe radius (direction cosines), as the whole-mask check takes them."""
    diameter = 2 * math.sqrt(max(n, 1) * cell_area_um2 / math.pi)
    lmax = max([abs(target.charge or 0)] + [abs(c[0]) for c in target.channels])
    return diameter, (2.5 + 0.5 * lmax) * target.wavelength_nm * 1e-3 / diameter


def _extra_figures(extras: dict, target: OpticsTarget, n: int, diameter: float, st: dict) -> dict:
    """OAM spectrum, fringe reading, crosstalk and lens figures from the extra accumulators (module
    :mod:`metalay.checks._stream_figures`), each with its method and bound."""
    from metalay.checks import _stream_figures as sfig

    out = {}
    if "oam" in extras:
        out["oam"] = sfig.oam_figure(extras["oam"], target, diameter, st["period_nm"] * 1e-3)
    if "fringe" in extras:
        out["fringe_reading"], extras["fringe_image"] = sfig.fringe_figure(extras["fringe"], target,
                                                                           st["period_nm"] * 1e-3)
    if "channels" in extras:
        out["crosstalk"] = sfig.crosstalk_figure(extras["channels"])
    if "lens" in extras:
        out["lens"] = sfig.lens_figure(extras["lens"], target, n, st["cell"][0] * st["cell"][1])
    return out


def _spots(accs: dict, centres: dict, n: int, cell: tuple, radius_u: float, pad_factor: float):
    """Each spot's window, its power as a fraction of the incident power, and the bound of that fraction."""
    windows, fractions, bounds = {}, {}, {}
    for name, (u0, v0) in centres.items():
        acc = accs[name]
        lam_um = acc.wavelength_nm * 1e-3
        wx, wy = acc.extent_um
        du, dv = lam_um / (pad_factor * wx), lam_um / (pad_factor * wy)
        half = int(math.ceil(radius_u / min(du, dv))) + 2
        ff = acc.window(u0, v0, du, dv, half, cell_um=cell)
        norm = du * dv * cell[0] * cell[1] / (lam_um * lam_um * n)
        windows[name] = ff
        fractions[name], bounds[name] = disk_power(ff, u0, v0, radius_u, norm)
    return windows, fractions, bounds


def _setup(mask_path, lib, design, target, layer, polarization, opts: dict):
    """Layer, bias, target, side, lattice: everything the stream needs, from the design or the library."""
    mask_settings = getattr(design, "mask", None)
    if layer is None:
        layer = mask_settings.layer("structures") if mask_settings is not None else (1, 0)
    if getattr(mask_settings, "tone", "structures") != "structures":
        raise MetalayError(f"{mask_path}: mask.tone = {mask_settings.tone!r}; the optical check reads structure "
                           "polygons and supports tone 'structures' only")
    no_target = target is None and design is None
    wl = opts.get("wavelength_nm")
    if target is None:
        target = (target_from_design(design, wavelength_nm=wl) if design is not None
                  else OpticsTarget(wavelength_nm=float(wl or lib.design_wavelength_nm), charge=None))
    period_nm = design.lattice.period_nm if design is not None else lib.period_nm
    lattice = design.lattice.kind if design is not None else lib.lattice
    p_um = period_nm * 1e-3
    bias = opts.get("bias_nm")
    return {"layer": tuple(layer), "target": target, "no_target": no_target, "period_nm": period_nm,
            "bias_nm": float(bias if bias is not None else (getattr(mask_settings, "bias_nm", 0.0) or 0.0)),
            "lattice": lattice, "facing": facing_of(design, lib, lit_from=opts.get("lit_from"), where=str(mask_path)),
            "polarization": polarization, "where": str(mask_path), "size_tol_nm": opts.get("size_tol_nm", 3.0),
            "unmatched": opts.get("unmatched", "error"), "design": design,
            "cell": (p_um, p_um) if lattice == "square" else (p_um, p_um * math.sqrt(3) / 2)}  # hexagonal: brick


def check_optics_streamed(mask_path, library, *, design=None, target: OpticsTarget | None = None,
                          block_um: float | None = None, order: int = 1, pad_factor: float = 2.0,
                          polarization: str = "design", layer=None, chunk_polygons: int = 1 << 18,
                          max_side: int = 2048, limits=None, wavelength_nm: float | None = None,
                          lit_from: str | None = None, bias_nm: float | None = None, size_tol_nm: float = 3.0,
                          unmatched: str = "error", read_ahead: bool = True) -> StreamedOptics:
    """Optical check of a mask of any size: far field accumulated tile by tile from block sums, bound stated.

    Parameters
    ----------
    mask_path : str or Path
        GDSII or OASIS file (read as chunks: the whole mask is never held).
    library : CellLibrary or str
        Cell library (responses at the wavelength, else ideal half-wave cells, stated in the notes).
    design : Design, optional
        Target (tilt, channels, spin, wavelength), lattice, layer, bias and side.
    target : OpticsTarget, optional
        Overrides what is derived from ``design``.
    block_um : float, optional
        Block side ``B``; default :func:`block_size_for` (phase error at most 0.25 rad within four lobe radii of
        each spot, at most ``max_side`` blocks per side).
    order : {0, 1}
        Block sums only, or with first moments (error second order in ``B``).
    pad_factor : float
        Far-field sampling: steps ``wavelength / (pad_factor x grid extent)`` (as zero padding by that factor).
    polarization : str
        Input polarisation (:func:`metalay.checks.optics.input_jones`).
    layer : (int, int), optional
        Structure layer/datatype (default the design's, else (1, 0)).
    chunk_polygons, max_side, limits
        Chunk size of the read; largest block-grid side; verdict thresholds.
    wavelength_nm, lit_from, bias_nm, size_tol_nm, unmatched
        As :class:`metalay.checks.optics.OpticsOptions` (defaults: the design's, else the library's).
    read_ahead : bool
        Read the next chunk in a second thread while this one is decoded (:func:`prefetch`; same results).

    Returns
    -------
    StreamedOptics
        ``figures`` carry ``method`` ("streamed block far field"), ``block`` (size, order, grid) and
        ``error_bound`` (formula and values), ``power_budget`` (exact sums), ``far_field`` spot fractions of the
        incident power with bounds, ``designed_spot_efficiency`` (and ``_bound``), ``oam`` (axis charge),
        ``crosstalk`` (multiplexed), ``lens`` (focal length), each with its ``method`` and bound
        (:mod:`metalay.checks._stream_figures`), ``fringe_reading`` (axis charge: the charge read from a
        simulated fork interferogram of the block-averaged near field) and ``verdicts``.

    Notes
    -----
    One accumulator per measured spot, its sites demodulated by the spot's direction ``(u_c, v_c)`` (multiplied
    by ``exp(-i k (u_c x + v_c y))``), so the phase error that the bound grows with is measured from the spot,
    not from the axis: a spot far off axis costs no finer blocks.
    """
    from metalay.cells.library import CellLibrary, load_library
    from metalay.io.stream_read import count_polygons, iter_mask_chunks

    t_all = time.perf_counter()
    lib = library if isinstance(library, CellLibrary) else load_library(library)
    st = _setup(mask_path, lib, design, target, layer, polarization,
                {"wavelength_nm": wavelength_nm, "lit_from": lit_from, "bias_nm": bias_nm,
                 "size_tol_nm": size_tol_nm, "unmatched": unmatched})
    target, cell = st["target"], st["cell"]
    n_poly, side_sites = _size_estimate(mask_path, design, st, count_polygons)
    _, radius0 = _lobe_radius(target, n_poly, cell[0] * cell[1])
    centres = {} if st["no_target"] else spot_centres(target, radius0)[0]
    if block_um is None:
        block_um = block_size_for(st["period_nm"], target.wavelength_nm, 4 * radius0, side_sites, max_side=max_side)
    accs = {name: FarFieldAccumulator(float(block_um), target.wavelength_nm, order, carrier=(float(u), float(v)),
                                      max_side=max_side) for name, (u, v) in centres.items()}
    from metalay.checks._stream_figures import make_extras

    half = design.aperture.half_extent_um if design is not None else None
    extras = {} if st["no_target"] else make_extras(target, n_poly, st["period_nm"] * 1e-3, cell[0] * cell[1],
                                                    max_side, lattice=st["lattice"], half_extent_um=half)
    notes: list = []
    chunks = iter_mask_chunks(mask_path, layers=[st["layer"]], chunk_polygons=chunk_polygons)
    sums, stats = _stream_sites(chunks, lib, st, accs, extras, notes, read_ahead=read_ahead)
    t_sites = time.perf_counter() - t_all
    n = stats["sites"]
    diameter, radius_u = _lobe_radius(target, n, cell[0] * cell[1])
    block_um = next(iter(accs.values())).block_um if accs else block_um  # merged when the mask outgrew max_side
    windows, fractions, bounds = _spots(accs, centres, n, cell, radius_u, pad_factor)
    figures = _streamed_figures(windows, target, sums, stats, n, fractions, bounds, radius_u, diameter,
                                float(block_um), order, pad_factor, st)
    figures.update(_extra_figures(extras, target, n, diameter, st))
    windows.update(extras.get("lens", {}).get("windows", {}))
    verdicts = optics_verdicts(json_ready(figures), limits if limits is not None else
                               getattr(getattr(design, "checks", None), "limits", None))
    figures["verdicts"] = verdicts
    notes += [f"illumination: {st['facing'].describe()}",
              f"streamed: {n:,} sites in chunks of {chunk_polygons:,} polygons; far field of each spot from "
              f"{block_um:.4g} um block sums (order {order}) demodulated by the spot's direction; empty illuminated "
              "cells are not counted (elements only); duplicates across chunks are not detected", SAFETY_NOTE]
    if st["no_target"]:
        notes.append("no design given: no spots measured (power budget only)")
    if "fringe" in extras:
        fr = figures["fringe_reading"]
        notes.append(f"fringe reading: the converted near field averaged over blocks of {fr['block_cells'][0]} x "
                     f"{fr['block_cells'][1]} cells ({fr['grid'][0]} x {fr['grid'][1]} blocks about the axis), "
                     "then the whole-mask check's interferogram and charge reading" + (
                         f"; {fr['sites_outside_grid']:,} sites beyond the design's aperture lie outside the grid "
                         "and are left out of it" if fr["sites_outside_grid"] else ""))
    timings = {"sites_s": t_sites, "total_s": time.perf_counter() - t_all}
    return StreamedOptics(json_ready(figures), windows, tuple(notes), timings, extras.get("fringe_image"))


def _streamed_figures(windows, target, sums, stats, n, fractions, bounds, radius_u, diameter, block_um, order,
                      pad_factor, st) -> dict:
    grid = next(iter(windows.values())) if windows else None
    in_disk = {}
    for name, ff in windows.items():
        u0, v0 = ff.carrier
        inside = (ff.u[None, :] - u0) ** 2 + (ff.v[:, None] - v0) ** 2 < radius_u ** 2
        in_disk[name] = float(ff.bound[inside].max() / ff.amplitude_sum) if inside.any() else None
    figures = {
        "method": "streamed block far field",
        "illumination": st["facing"].as_dict(), "wavelength_nm": target.wavelength_nm,
        "input_polarization": st["polarization"], "design_spin": target.sigma,
        "power_budget": _budget(sums, n), "decode": stats,
        "block": {"block_um": block_um, "order": order, "pad_factor": pad_factor,
                  "site_offset_um": list(grid.reach_um) if grid is not None else None},
        "error_bound": {
            "field": ("|E_B - E| <= A phi^2 / 2" if order == 1 else "|E_B - E| <= A min(phi, 2)")
            + " + 1e-12 A, phi = 2 pi (dx |u - u_c| + dy |v - v_c|) / wavelength <= pi B (|u - u_c| + "
            "|v - v_c|) / wavelength; A = sum |f_s|; (dx, dy) the largest site offsets from their block centres; "
            "(u_c, v_c) the spot's direction (sites demodulated by it); times the cell-aperture factor",
            "power": "sum over the disk of eps (2 |E_B| + eps) du dv, as a fraction of the incident power",
            "max_relative_field_bound_in_disk": in_disk},
        "aperture_equivalent_diameter_um": diameter, "lobe_radius_u": radius_u,
        "far_field": {"fractions_of_incident": fractions, "bounds_of_fractions": bounds},
    }
    if "designed" in fractions:
        figures["designed_spot_efficiency"] = fractions["designed"]
        figures["designed_spot_efficiency_bound"] = bounds["designed"]
    return figures


def hash_in_background(path):
    """Start the SHA-256 of ``path`` in a thread (``hashlib`` releases the GIL: it runs on the second core while
    the mask streams); returns a function that waits for it and gives the hex digest (or raises the read error)."""
    import threading

    from metalay.checks.optics import _sha256

    out: dict = {}

    def run():
        try:
            out["sha256"] = _sha256(path)
        except OSError as exc:
            out["error"] = exc

    worker = threading.Thread(target=run, name="mask-hash", daemon=True)
    worker.start()

    def result() -> str:
        worker.join()
        if "error" in out:
            raise out["error"]
        return out["sha256"]

    return result


def write_streamed_outputs(res: StreamedOptics, path, library, design, out_dir, *,
                           mask_sha256: str | None = None) -> tuple[dict, dict]:
    """Write ``optics.json`` (figures, inputs, the caution), ``interferogram.png`` (axis charge) and
    ``optics_report.html`` to ``out_dir`` (atomically); return the figures as written and the files (name -> path,
    sha256, bytes). ``mask_sha256``: the mask's digest when already known (:func:`hash_in_background`)."""
    from pathlib import Path

    from metalay.checks.optics import _sha256, _write_outputs
    from metalay.checks.report import render_html

    path = Path(path)
    f = dict(res.figures)
    inputs = {"mask": {"path": path.name, "sha256": mask_sha256 or _sha256(path), "bytes": path.stat().st_size},
              "library": {"name": getattr(library, "name", str(library))}, "design": getattr(design, "name", None),
              "method": f["method"], "block_um": f["block"]["block_um"], "verdict": f["verdicts"]["verdict"]}
    f["inputs"] = json_ready(inputs)
    f["caution"] = SAFETY_NOTE
    v = f["verdicts"]
    images = _images(res, f)
    html = render_html(title=f"Optical check (streamed) of {path.name}: verdict {v['verdict'].upper()}",
                       caution=SAFETY_NOTE, inputs=inputs, figures={k: x for k, x in f.items() if k != "inputs"},
                       images=images, notes=[f"verdict {v['verdict'].upper()}: {v['summary']}", *res.notes])
    return f, _write_outputs(Path(out_dir), f, images, html)


def _images(res: StreamedOptics, figures: dict) -> dict:
    """The report's PNG figures, name -> (caption, PNG bytes): the fork interferogram (designs with an axis
    charge), as the whole-mask check draws it."""
    if res.fringe_image is None:
        return {}
    from metalay.checks import plots

    fr = figures["fringe_reading"]
    read = fr["charge"] if fr["status"] == "read" else f"unreadable ({fr.get('reason', '')})"
    return {"7_interferogram": (f"converted beam (means over blocks of {fr['block_cells'][0]} x "
                                f"{fr['block_cells'][1]} cells) with a tilted plane reference; charge read: {read}",
                                plots.interferogram_map(*res.fringe_image))}


def compile_check_streamed(path, library, design, *, mask_sha256: str | None = None) -> dict:
    """Hook for ``metalay compile`` on a mask too large for the whole-mask check: the streamed check, written to
    ``<mask folder>/optics`` (``optics.json`` and ``optics_report.html``); a manifest-ready dict shaped like
    :func:`metalay.checks.optics.compile_check`'s, with ``method``. ``mask_sha256``: the mask's digest when the
    compile computed it while writing (else it is computed beside the check)."""
    import os
    from pathlib import Path

    path = Path(path)
    digest = (lambda: mask_sha256) if mask_sha256 else hash_in_background(path)
    res = check_optics_streamed(path, library, design=design)
    f, written = write_streamed_outputs(res, path, library, design, path.parent / "optics", mask_sha256=digest())
    files = {k: {"path": os.path.relpath(x["path"], path.parent), "sha256": x["sha256"], "bytes": x["bytes"]}
             for k, x in written.items()}
    v = f["verdicts"]
    pb = f["power_budget"]
    parts = [f"converted {pb['converted']:.3f}", f"leakage {pb['leakage']:.3f}"]
    if "designed_spot_efficiency" in f:
        parts.append(f"designed spot {f['designed_spot_efficiency']:.3f} "
                     f"(+- {f['designed_spot_efficiency_bound']:.2g} block bound)")
    if "oam" in f:
        parts.append(f"OAM purity {f['oam']['purity']:.3f} (+- {f['oam']['purity_bound']:.2g})")
    if "fringe_reading" in f:
        fr = f["fringe_reading"]
        parts.append(f"fringe charge {fr['charge'] if fr['status'] == 'read' else 'unreadable'}")
    if f.get("crosstalk", {}).get("worst_isolation_db") is not None and len(f["crosstalk"]["charges"]) > 1:
        parts.append(f"worst isolation {f['crosstalk']['worst_isolation_db']:.1f} dB")
    if f.get("lens", {}).get("strehl") is not None:
        parts.append(f"Strehl {f['lens']['strehl']:.3f}")
    return {"status": v["verdict"], "verdict": v["verdict"], "verdict_items": v["items"],
            "verdict_summary": v["summary"], "summary": "; ".join(parts) + " (streamed block far field)",
            "figures": f, "files": files, "notes": list(res.notes), "timings_s": res.timings,
            "method": {"method": f["method"], "block_um": f["block"]["block_um"], "order": f["block"]["order"]}}
