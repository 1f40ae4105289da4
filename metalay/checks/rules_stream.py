"""Design-rule check of a mask too large to hold: horizontal bands with a halo, each violation counted once.

The mask is read as a stream of polygon chunks (:func:`metalay.io.stream_read.iter_mask_chunks`) twice:

1. survey: the y extent of the mask, the number of polygons, the tallest polygon ``H`` of every layer that
   has a pair rule (spacing, overlap), the y range of each chunk, and the frame-layer polygons;
2. bands: every polygon goes to each band its y range touches once widened by the halo; it is *owned* by the one
   band holding its canonical point, the lowest y of its bounding box. When the chunks come in y order (as our
   compile writes a mask: row after row), the second read is a sweep in memory: a band is checked as soon as the
   last chunk reaching it has been read, holding about one band and one chunk (:func:`_sweep_plan` decides from
   the survey's chunk ranges). Otherwise (polygons in no y order, or many frame polygons) the polygons are
   distributed into per-band spill files (a temporary folder) first. Both give the same bands (tested).

Each band is then checked alone with :func:`metalay.checks.rules._check_layer`, reporting only what it owns: a
single-polygon rule reports the polygons the band owns; a pair rule reports the pairs whose first polygon (the
lower index, as the whole-mask check orders pairs) the band owns. The halo is ``H + s`` (``s`` the largest
spacing limit, with slack), so a band holds every polygon closer than ``s`` to a polygon it owns and finds every
pair the whole-mask check finds, with the same coordinates, hence bit-identical values. Polygons keep their
mask-wide indices (bands are built in file order), so the merged report equals the whole-mask report: same
violations, values, locations, order and checked counts (tested as an equivalence check on masks that fit).
Polygons of a frame layer (the ``inside_frame`` rule) go to every band, since the frame region is their union.

Where the results may differ: the method text of the spacing rule (a band may take the lattice stencil or the
STRtree on its own; both give the same pairs), and a pair search that stops at its pair cap (counts are lower
bounds then, in both checks, with caps counted per band here).

Memory: the walk of the file (about 10 bytes per element for flat GDSII), one chunk and one band with its halo
(with the sweep, also the rows of the next band read so far, at most :data:`_SWEEP_HOLD_LIMIT` bands in all); the
band height follows the memory budget (:data:`BAND_BYTES_PER_POLYGON` per polygon). Time: linear in the polygons
(each is decoded twice and checked in ``1 + halo / band`` bands).
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.checks.rules import _KIND, MAX_PAIRS, RuleReport, RuleResult, RuleSet, Violations, _check_layer
from metalay.errors import MaskReadError, RulesError
from metalay.io.gdsread import DEFAULT_MAX_ELEMENTS, FlatPolygons, file_sha256
from metalay.util._memory import keep_freed_memory
from metalay.util.budget import memory_budget

__all__ = ["TilePlan", "check_mask_tiled", "involved_polygons", "BAND_BYTES_PER_POLYGON", "chunks_of"]

BAND_BYTES_PER_POLYGON = 300
"""Peak bytes per polygon of checking one band (the whole-mask check's measured ~300 B per site, which includes
the read; used to choose the band height from the memory budget)."""
_BUDGET_SHARE = 0.5  # share of the budget one band may take (the rest: walk table, chunk, spill buffers)
_PEAK_DENSITY = 1.5  # a round aperture's middle band holds 4/pi of the mean; plus the halo copies
_SORT_KIND = {"grid": "max", "field_straddle": "max"}  # rules emitted with an explicit sort order


@dataclass(frozen=True)
class TilePlan:
    """How a tiled check cut the mask (lengths in database units).

    Attributes
    ----------
    bands : int
        Number of horizontal bands.
    y0_db, band_db : int
        Lowest polygon y and band height: band ``k`` owns canonical points ``y0 + k band <= y < y0 + (k+1) band``.
    halo_db : int
        Extra height loaded above and below each band: ``H + s`` (tallest polygon of a pair-rule layer plus the
        largest spacing limit, with slack).
    polygons : int
        Polygons read (on the rule layers).
    loaded : int
        Polygons loaded summed over the bands (``>= polygons``: halo and frame copies).
    largest_band : int
        Most polygons loaded into one band.
    """

    bands: int
    y0_db: int
    band_db: int
    halo_db: int
    polygons: int
    loaded: int
    largest_band: int

    def as_dict(self, db_unit_nm: float) -> dict:
        """JSON-ready summary with lengths in micrometres."""
        um = db_unit_nm / 1000.0
        return {"method": "tiled", "bands": self.bands, "band_um": self.band_db * um, "halo_um": self.halo_db * um,
                "polygons": self.polygons, "loaded": self.loaded, "largest_band": self.largest_band,
                "owner": "the band holding the lowest y of the polygon's bounding box (pairs: of the first polygon)"}


def chunks_of(flat: FlatPolygons, chunk_polygons: int = 1 << 18) -> Callable[[], Iterator[FlatPolygons]]:
    """A re-startable chunk source over polygons already in memory (for tests and callers holding a mask)."""
    def source():
        for lo in range(0, flat.count, chunk_polygons):
            hi = min(flat.count, lo + chunk_polygons)
            s = flat.start[lo:hi + 1]
            yield FlatPolygons(flat.layer[lo:hi], flat.datatype[lo:hi], s - s[0], flat.xy_db[s[0]:s[-1]],
                               flat.db_unit_nm, flat.user_unit_m)
    return source


def _y_range(ch: FlatPolygons) -> tuple[np.ndarray, np.ndarray]:
    """Lowest and highest vertex y of each polygon (0 for a polygon without vertices)."""
    cnt = np.diff(ch.start)
    y = ch.xy_db[:, 1]
    if ch.count and y.size == ch.count * int(cnt[0]) and int(cnt[0]) > 0 and int(cnt.min()) == int(cnt.max()):
        ys = y.reshape(ch.count, int(cnt[0]))  # every polygon with the same vertex count: column by column
        lo, hi = ys[:, 0].copy(), ys[:, 0].copy()
        for k in range(1, ys.shape[1]):
            np.minimum(lo, ys[:, k], out=lo)
            np.maximum(hi, ys[:, k], out=hi)
        return lo.astype(np.int64, copy=False), hi.astype(np.int64, copy=False)
    lo = np.zeros(ch.count, np.int64)
    hi = np.zeros(ch.count, np.int64)
    has = cnt > 0
    if y.size:
        at = ch.start[:-1][has]
        lo[has] = np.minimum.reduceat(y, at)
        hi[has] = np.maximum.reduceat(y, at)
    return lo, hi


def _keys(pairs) -> np.ndarray:
    return np.array(sorted(int(a) * 65536 + int(b) for a, b in pairs), np.int64)


def _on(ch: FlatPolygons, keys: np.ndarray) -> np.ndarray:
    """Whether each polygon's (layer, datatype) is one of ``keys`` (layer * 65536 + datatype)."""
    if keys.size > 8:
        return np.isin(ch.layer.astype(np.int64) * 65536 + ch.datatype, keys)
    out = np.zeros(ch.count, bool)
    for key in keys.tolist():  # a few layers: compare the columns directly
        out |= (ch.layer == key // 65536) & (ch.datatype == key % 65536)
    return out


#: Most frame-layer (context) polygons kept in memory from the survey for the in-memory sweep (they go to every
#: band); with more, the bands go through spill files.
_MAX_CONTEXT_ROWS = 1 << 16


def _survey(source, pair_keys, context_keys):
    """Pass 1: polygon count, y extent (frame polygons excluded), tallest pair-rule polygon, database unit; per
    chunk its rows and the y range of its body (non-frame) polygons; the frame polygons themselves (rows as in
    :func:`_rows_of`, and vertices), or None when there are more than :data:`_MAX_CONTEXT_ROWS`."""
    n, y0, y1, tall, db, uu = 0, None, None, 0, None, None
    stats, context = [], []
    for ch in source():
        db, uu = (ch.db_unit_nm, ch.user_unit_m) if db is None else (db, uu)
        if ch.db_unit_nm != db:
            raise MaskReadError(f"mask chunks disagree on the database unit ({db} and {ch.db_unit_nm} nm)")
        lo, hi = _y_range(ch)
        ctx = _on(ch, context_keys)
        body = ~ctx
        if body.any():
            y0 = int(lo[body].min()) if y0 is None else min(y0, int(lo[body].min()))
            y1 = int(hi[body].max()) if y1 is None else max(y1, int(hi[body].max()))
        stats.append((ch.count, int(lo[body].min()) if body.any() else None,
                      int(hi[body].max()) if body.any() else None))
        if ctx.any() and context is not None:
            context.append(tuple(a.copy() for a in _select_rows(_rows_of(ch, n, lo), ch.xy_db, ctx)))
            if sum(m.shape[0] for m, _ in context) > _MAX_CONTEXT_ROWS:
                context = None
        pl = _on(ch, pair_keys)
        if pl.any():
            tall = max(tall, int((hi[pl] - lo[pl]).max()))
        n += ch.count
    return n, (y0 or 0), (y1 if y1 is not None else 0), tall, (db or 1.0), (uu or 1e-6), stats, context


def _rows_of(ch: FlatPolygons, offset: int, lo: np.ndarray) -> np.ndarray:
    """Rows (mask index, layer, datatype, vertex count, first vertex, lowest y) of a chunk's polygons."""
    cnt = np.diff(ch.start)
    return np.stack([np.arange(offset, offset + ch.count), ch.layer.astype(np.int64),
                     ch.datatype.astype(np.int64), cnt, ch.start[:-1], lo], axis=1)


def _reach_db(rules: RuleSet, db_unit_nm: float) -> int:
    """Largest spacing limit in database units, rounded up, with slack (pairs at exactly the limit included)."""
    s = max([lr.min_spacing_nm or 0.0 for lr in rules.layers], default=0.0)
    if not math.isfinite(s):
        raise RulesError(f"a spacing limit is not finite ({s}); allowed: a finite number of nm")
    return int(math.ceil(s / db_unit_nm * (1 + 1e-9))) + 2


def _bands_for(n_polygons: int, max_memory_bytes: int | None, reserved_bytes: float = 0.0) -> int | None:
    """Bands for ``n_polygons`` so that one band fits its share of the budget less ``reserved_bytes`` (None when
    that leaves less than a quarter of the share)."""
    budget = memory_budget(max_memory_bytes) * _BUDGET_SHARE
    room = budget - reserved_bytes
    if reserved_bytes and room < budget / 4:
        return None
    return max(1, int(math.ceil(n_polygons * BAND_BYTES_PER_POLYGON * _PEAK_DENSITY / max(room, 1.0))))


def _select_rows(meta: np.ndarray, xy: np.ndarray, sel: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The rows ``sel`` (bool) of ``meta`` and their vertices (column 4: each row's first vertex in ``xy``); a run
    of consecutive rows (a band's part of a chunk written in y order) is taken as slices, without copying."""
    at = np.flatnonzero(sel)
    if at.size and int(at[-1]) - int(at[0]) + 1 == at.size:
        r0, r1 = int(at[0]), int(at[-1]) + 1
        return meta[r0:r1], xy[int(meta[r0, 4]):int(meta[r1 - 1, 4] + meta[r1 - 1, 3])]
    xy = xy[np.repeat(sel, meta[:, 3])] if at.size < meta.shape[0] else xy
    meta = meta[at]
    meta[:, 4] = np.cumsum(meta[:, 3]) - meta[:, 3]
    return meta, xy


def _in_mask_order(pieces) -> tuple[np.ndarray, np.ndarray]:
    """Rows and vertices of spill pieces, concatenated and ordered by mask index (stable)."""
    meta = np.concatenate([m for m, _ in pieces]) if pieces else np.zeros((0, 6), np.int64)
    xy = np.concatenate([x for _, x in pieces]) if pieces else np.zeros((0, 2), np.int64)
    if meta.shape[0] > 1 and np.any(meta[1:, 0] < meta[:-1, 0]):
        order = np.argsort(meta[:, 0], kind="stable")
        c = meta[order, 3]
        start = np.cumsum(meta[:, 3]) - meta[:, 3]
        xy = xy[np.repeat(start[order] - (np.cumsum(c) - c), c) + np.arange(int(c.sum()))]
        meta = meta[order]
    meta[:, 4] = np.cumsum(meta[:, 3]) - meta[:, 3]
    return meta, xy


def _band_of(y: np.ndarray, plan: TilePlan, shift: int) -> np.ndarray:
    """Band index of ``y + shift`` (clipped to the bands), as the distribution pass computes it."""
    return np.clip((y + shift - plan.y0_db) // plan.band_db, 0, plan.bands - 1)


class _Spill:
    """Per-band files of the distributed polygons: meta rows (index, layer, datatype, count, owned) and xy."""

    def __init__(self, folder: Path, bands: int):
        self.folder, self.bands = folder, bands
        self.loaded = np.zeros(bands, np.int64)

    def _path(self, b: int, kind: str) -> Path:
        return self.folder / f"band{b:06d}.{kind}"

    def put(self, b: int, meta: np.ndarray, xy: np.ndarray) -> None:
        with open(self._path(b, "meta"), "ab") as fh:
            meta.tofile(fh)
        with open(self._path(b, "xy"), "ab") as fh:
            xy.tofile(fh)
        self.loaded[b] += meta.shape[0]

    def take(self, b: int, db_unit_nm: float, user_unit_m: float):
        """The band's polygons (file order), their mask-wide indices and ownership; the files are removed."""
        if self.loaded[b] == 0:
            z = np.zeros(0, np.int64)
            return FlatPolygons.from_arrays(z, z, z, np.zeros((0, 2), np.int64), db_unit_nm=db_unit_nm,
                                            user_unit_m=user_unit_m), z, np.zeros(0, bool)
        meta = np.fromfile(self._path(b, "meta"), np.int64).reshape(-1, 5)
        xy = np.fromfile(self._path(b, "xy"), np.int64).reshape(-1, 2)
        for kind in ("meta", "xy"):
            os.remove(self._path(b, kind))
        flat = FlatPolygons.from_arrays(meta[:, 1], meta[:, 2], meta[:, 3], xy, db_unit_nm=db_unit_nm,
                                        user_unit_m=user_unit_m)
        return flat, meta[:, 0].copy(), meta[:, 4].astype(bool)


def _distribute(source, plan: TilePlan, context_keys, spill: _Spill) -> None:
    """Pass 2: each polygon to every band its widened y range touches (frame polygons: every band)."""
    offset = 0
    nb, y0, h, halo = plan.bands, plan.y0_db, plan.band_db, plan.halo_db
    for ch in source():
        lo_y, hi_y = _y_range(ch)
        owner = np.clip((lo_y - y0) // h, 0, nb - 1)
        lo = np.clip((lo_y - halo - y0) // h, 0, nb - 1)
        hi = np.clip((hi_y + halo - y0) // h, 0, nb - 1)
        ctx = _on(ch, context_keys)
        lo[ctx], hi[ctx] = 0, nb - 1
        reps = hi - lo + 1
        poly = np.repeat(np.arange(ch.count), reps)
        first = np.repeat(np.cumsum(reps) - reps, reps)
        band = np.repeat(lo, reps) + (np.arange(poly.size) - first)
        order = np.argsort(band, kind="stable")  # per band, polygons stay in file order
        poly, band = poly[order], band[order]
        cuts = np.flatnonzero(np.diff(band)) + 1
        cnt = np.diff(ch.start)
        for sel in np.split(np.arange(poly.size), cuts):
            if sel.size == 0:
                continue
            b = int(band[sel[0]])
            p = poly[sel]
            meta = np.stack([p + offset, ch.layer[p].astype(np.int64), ch.datatype[p].astype(np.int64), cnt[p],
                             (owner[p] == b).astype(np.int64)], axis=1)
            c = cnt[p]
            v = np.repeat(ch.start[p] - (np.cumsum(c) - c), c) + np.arange(int(c.sum()))
            spill.put(b, meta, ch.xy_db[v])
        offset += ch.count


def _merge(parts: list[RuleResult], gidx_parts: list) -> RuleResult:
    """One rule's results over the bands: global indices, re-sorted as the whole-mask check sorts them."""
    first = parts[0]
    pol = np.concatenate([g[r.violations.polygon] for r, g in zip(parts, gidx_parts)])
    oth = np.concatenate([np.where(r.violations.other >= 0, g[np.maximum(r.violations.other, 0)], -1)
                          for r, g in zip(parts, gidx_parts)])
    val = np.concatenate([r.violations.value for r in parts])
    x = np.concatenate([r.violations.x_um for r in parts])
    y = np.concatenate([r.violations.y_um for r in parts])
    seg = np.concatenate([r.violations.segment_um for r in parts]).reshape(-1, 4)
    kind = _SORT_KIND.get(first.rule, _KIND[first.rule])
    order = np.lexsort((oth, pol, -val if kind == "max" else val))
    vio = Violations(pol[order], oth[order], val[order], x[order], y[order], seg[order])
    methods = sorted({r.method for r in parts})
    caps = [r.pair_cap for r in parts if r.pair_cap is not None]
    return RuleResult(first.rule, first.layer, first.datatype, first.limit, first.unit, first.kind, first.reason,
                      first.source, sum(r.checked for r in parts), methods[0] if len(methods) == 1 else
                      " / ".join(methods), vio, max(caps) if caps else None)


#: The second pass sweeps the bands in memory when, by the survey's chunk y ranges, the chunks it must hold at once
#: have at most this many mean bands of polygons (plus two chunks); a file written in y order, as our compile
#: writes, holds about one band and a chunk. Otherwise (polygons in no y order) it distributes them into per-band
#: files.
_SWEEP_HOLD_LIMIT = 3.0
_SWEEP = True  # False: always through band files (tests compare the two)


def _sweep_plan(stats, plan: TilePlan):
    """The last chunk each band needs (-1: none), or None when sweeping would hold too many polygons at once.

    A chunk's rows are held (band pieces are views of the chunk) from its read until the last band it reaches is
    handed on; bands are handed on in order, band ``b`` once chunk ``max(last[:b + 1])`` has been read."""
    nb, nc = plan.bands, len(stats)
    last = np.full(nb, -1, np.int64)
    reach = []
    for c, (_, ylo, yhi) in enumerate(stats):
        if ylo is None:
            reach.append(None)
            continue
        b0 = int(_band_of(np.array([ylo]), plan, -plan.halo_db)[0])
        b1 = int(_band_of(np.array([yhi]), plan, plan.halo_db)[0])
        last[b0:b1 + 1] = c
        reach.append(b1)
    handed = np.maximum.accumulate(last)  # band b is handed on after reading chunk handed[b]
    held = np.zeros(nc + 1, np.int64)
    for c, b1 in enumerate(reach):
        if b1 is not None:
            held[c] += stats[c][0]
            held[max(c, int(handed[b1])) + 1] -= stats[c][0]
    peak = int(np.cumsum(held).max(initial=0))
    biggest = max((count for count, _, _ in stats), default=0)
    return last if peak <= _SWEEP_HOLD_LIMIT * plan.polygons / nb + 2 * biggest else None


def _band_from(pieces, context, b: int, plan: TilePlan, db: float, uu: float):
    """A band's (polygons in mask order, mask-wide indices, ownership) from its rows and the frame rows."""
    meta, xy = _in_mask_order(list(pieces) + list(context))
    flat = FlatPolygons.from_arrays(meta[:, 1], meta[:, 2], meta[:, 3], xy, db_unit_nm=db, user_unit_m=uu)
    return flat, meta[:, 0].copy(), _band_of(meta[:, 5], plan, 0) == b


def _sweep_bands(source, plan: TilePlan, context_keys, last: np.ndarray, context, db: float, uu: float):
    """Pass 2 in memory: each chunk's polygons go to the bands their widened y range touches (as
    :func:`_distribute` sends them), and a band is handed on once the last chunk it needs has been read."""
    nb = plan.bands
    pending: list[list] = [[] for _ in range(nb)]
    done, offset = 0, 0
    for c, ch in enumerate(source()):
        lo, hi = _y_range(ch)
        body = ~_on(ch, context_keys)
        b_lo, b_hi = _band_of(lo, plan, -plan.halo_db), _band_of(hi, plan, plan.halo_db)
        if body.any():
            rows = _rows_of(ch, offset, lo)
            for b in range(int(b_lo[body].min()), int(b_hi[body].max()) + 1):
                sel = body & (b_lo <= b) & (b <= b_hi)
                if sel.any():
                    pending[b].append(_select_rows(rows, ch.xy_db, sel))
        offset += ch.count
        while done < nb and last[done] <= c:
            yield _band_from(pending[done], context, done, plan, db, uu)
            pending[done] = None
            done += 1
    for b in range(done, nb):
        yield _band_from(pending[b], context, b, plan, db, uu)


def _iter_bands(source, plan: TilePlan, context_keys, sweep, db: float, uu: float, folder, loaded: np.ndarray,
                timings: dict):
    """Each band's (polygons, mask-wide indices, ownership) in band order; ``loaded`` gets the rows per band.

    ``sweep`` = (last chunk per band, frame rows) for the in-memory sweep, or None: spill files."""
    if sweep is not None:
        timings["distribute"] = 0.0
        bands = _sweep_bands(source, plan, context_keys, sweep[0], sweep[1], db, uu)
        for b in range(plan.bands):
            t1 = time.perf_counter()
            band = next(bands)
            timings["distribute"] += time.perf_counter() - t1
            loaded[b] = band[0].count
            yield band
        return
    t1 = time.perf_counter()
    spill = _Spill(Path(folder), plan.bands)
    _distribute(source, plan, context_keys, spill)
    loaded[:] = spill.loaded
    timings["distribute"] = time.perf_counter() - t1
    for b in range(plan.bands):
        yield spill.take(b, db, uu)


#: Bytes per polygon the streamed reader holds while it reads (its per-element table and resident pages: about
#: 25 B measured at 1e7 polygons of flat GDSII). The sweep checks bands during the second read, so its bands are
#: sized from the budget less this.
_READER_BYTES_PER_POLYGON = 30


def _plan(source, rules: RuleSet, max_memory_bytes, bands):
    """Survey and band plan; also the sweep (last chunk per band, frame rows) when it applies, else None.

    Without ``bands`` the sweep gets its own band count (more bands: the reader's table stays in memory while
    they are checked), or is not used when the budget has too little room beside that table."""
    pair_keys = _keys((lr.layer, lr.datatype) for lr in rules.layers
                      if lr.min_spacing_nm is not None or lr.forbid_overlap)
    context_keys = _keys(lr.inside_frame for lr in rules.layers if lr.inside_frame is not None)
    n, y0, y1, tall, db, uu, stats, context = _survey(source, pair_keys, context_keys)
    nb = int(bands) if bands is not None else _bands_for(n, max_memory_bytes)
    if nb < 1:
        raise RulesError(f"bands = {bands!r}; allowed: an integer >= 1")
    halo = tall + _reach_db(rules, db)

    def plan_of(nb):
        return TilePlan(nb, y0, max(1, -(-(y1 - y0 + 1) // nb)), halo, n, 0, 0)
    nb_sweep = nb if bands is not None else _bands_for(n, max_memory_bytes, _READER_BYTES_PER_POLYGON * n)
    if _SWEEP and context is not None and nb_sweep is not None:
        last = _sweep_plan(stats, plan_of(max(nb, nb_sweep)))
        if last is not None:
            return plan_of(max(nb, nb_sweep)), context_keys, db, uu, (last, context)
    return plan_of(nb), context_keys, db, uu, None


def check_mask_tiled(mask, rules: RuleSet, *, method: str = "auto", cell: str | None = None,
                     max_elements: int | None = None, max_memory_bytes: int | None = None,
                     max_pairs: int = MAX_PAIRS, bands: int | None = None, chunk_polygons: int = 1 << 18,
                     spill_dir=None, known_sha256: str | None = None) -> tuple[RuleReport, TilePlan]:
    """Check a mask band by band with bounded memory; the report equals :func:`metalay.checks.rules.check_mask`'s.

    Parameters
    ----------
    mask : str, os.PathLike, FlatPolygons or callable
        A GDSII/OASIS file (streamed, only the rule layers), polygons in memory, or a callable returning a fresh
        iterator of :class:`FlatPolygons` chunks each time it is called (it is called twice).
    rules : RuleSet
    method, cell, max_elements, max_pairs
        As :func:`check_mask` (``max_pairs`` applies per band).
    max_memory_bytes : int, optional
        Memory budget (``--max-memory``; default half of what the process may use); sets the band height when
        ``bands`` is not given: ``bands = ceil(1.5 polygons BAND_BYTES_PER_POLYGON / (budget / 2))`` through band
        files, with ``budget / 2 - polygons _READER_BYTES_PER_POLYGON`` in the denominator for the in-memory sweep
        (which needs at least a quarter of ``budget / 2`` left).
    bands : int, optional
        Number of horizontal bands (overrides the budget).
    chunk_polygons : int
        Polygons per chunk of the streamed read.
    spill_dir : path, optional
        Folder for the temporary band files (default the system's temporary folder); removed afterwards.
    known_sha256 : str, optional
        The file's SHA-256 when the caller computed it while writing the file (the report carries it instead of
        hashing the file again).

    Returns
    -------
    (RuleReport, TilePlan)
    """
    keep_freed_memory()  # bands allocate and free arrays of the same sizes: reuse them
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    sha, name = None, "<memory>"
    if isinstance(mask, FlatPolygons):
        source = chunks_of(mask, chunk_polygons)
    elif callable(mask):
        source = mask
    else:
        name = os.fspath(mask)
        source = None  # a file: the chunk source is opened below (an OASIS file is surveyed once for both passes)
    per_rule: dict[tuple, list] = {}
    gidx_of: dict[tuple, list] = {}
    from concurrent.futures import ThreadPoolExecutor

    # the file hash runs beside the survey (hashlib releases the GIL)
    with ThreadPoolExecutor(max_workers=1) as pool, contextlib.ExitStack() as stack, \
            tempfile.TemporaryDirectory(prefix="metalay-bands-", dir=spill_dir) as folder:
        fut = pool.submit(file_sha256, name) if name != "<memory>" and known_sha256 is None else None
        if source is None:
            from metalay.io.stream_read import chunk_source

            source = stack.enter_context(chunk_source(name, layers=rules.layer_pairs(), cell=cell,
                                                      chunk_polygons=chunk_polygons,
                                                      max_elements=max_elements or DEFAULT_MAX_ELEMENTS))
        plan, context_keys, db, uu, sweep = _plan(source, rules, max_memory_bytes, bands)  # bad file: one line
        try:
            sha = fut.result() if fut is not None else known_sha256
        except OSError as exc:
            raise MaskReadError(f"{name}: cannot read file for its checksum ({exc.strerror or exc})") from exc
        timings["survey"] = time.perf_counter() - t0
        loaded = np.zeros(plan.bands, np.int64)
        for b, (flat, gidx, owned) in enumerate(_iter_bands(source, plan, context_keys, sweep, db, uu, folder,
                                                                          loaded, timings)):
            band_timings: list = []
            for li, lr in enumerate(rules.layers):
                try:
                    res = _check_layer(flat, lr, rules, db, method, band_timings, max_pairs, owned=owned)
                except MemoryError as exc:
                    raise MaskReadError(f"{name}: out of memory checking band {b} of {plan.bands} ({flat.count} "
                                        "polygons): give a smaller --max-memory or more bands") from exc
                for r in res:
                    per_rule.setdefault((li, r.rule), []).append(r)
                    gidx_of.setdefault((li, r.rule), []).append(gidx)
            for k, v in band_timings:
                key = k.split(" ")[0]
                timings[key] = timings.get(key, 0.0) + v
    results = tuple(_merge(per_rule[k], gidx_of[k]) for k in per_rule)  # insertion order: layers, then rules
    plan = TilePlan(plan.bands, plan.y0_db, plan.band_db, plan.halo_db, plan.polygons, int(loaded.sum()),
                    int(loaded.max(initial=0)))
    report = RuleReport(name, sha, db, plan.polygons, rules.name, results, tuple(timings.items()))
    return report, plan


def involved_polygons(mask, report: RuleReport, *, rules: RuleSet, cell: str | None = None,
                      chunk_polygons: int = 1 << 18) -> tuple[FlatPolygons, RuleReport]:
    """The polygons a report names (one more streamed pass), and the report re-indexed to them.

    For :func:`metalay.checks.rules.write_marker_gds` after a tiled check: it needs only these polygons.
    """
    from dataclasses import replace

    from metalay.io.stream_read import iter_mask_chunks

    named = [r.violations.polygon for r in report.results] + [r.violations.other[r.violations.other >= 0]
                                                              for r in report.results]
    wanted = np.unique(np.concatenate(named)) if named else np.zeros(0, np.int64)
    chunks = (chunks_of(mask, chunk_polygons)() if isinstance(mask, FlatPolygons) else
              iter_mask_chunks(mask, layers=rules.layer_pairs(), cell=cell, chunk_polygons=chunk_polygons))
    parts, offset, db, uu = [], 0, report.db_unit_nm, 1e-6
    for ch in chunks:
        uu = ch.user_unit_m
        keep = np.isin(np.arange(offset, offset + ch.count), wanted)
        if keep.any():
            parts.append(ch.select(keep))
        offset += ch.count
    if parts:
        sub = FlatPolygons.from_arrays(np.concatenate([p.layer for p in parts]),
                                       np.concatenate([p.datatype for p in parts]),
                                       np.concatenate([np.diff(p.start) for p in parts]),
                                       np.concatenate([p.xy_db for p in parts]), db_unit_nm=db, user_unit_m=uu)
    else:
        z = np.zeros(0, np.int64)
        sub = FlatPolygons.from_arrays(z, z, z, np.zeros((0, 2), np.int64), db_unit_nm=db, user_unit_m=uu)

    def local(ix):
        return np.where(ix >= 0, np.searchsorted(wanted, np.maximum(ix, 0)), -1)

    results = tuple(replace(r, violations=replace(r.violations, polygon=local(r.violations.polygon),
                                                  other=local(r.violations.other))) for r in report.results)
    return sub, replace(report, results=results)
