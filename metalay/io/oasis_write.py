"""Streaming OASIS (SEMI P39) writer: tile by tile, memory bounded independently of the mask size.

A tile arrives as what the compile already has per tile: the distinct exact snapped shapes (vertex offsets in
database units) and, for every site, which shape it uses and its integer centre. Each shape of a tile becomes one
POLYGON record placed at its first site with a repetition for the others:

* a regular grid when the sites form one (type 2 or 3 along an axis, 9 along any direction, 1 for an axis-aligned
  nx x ny grid, 8 for a grid with one oblique step),
* otherwise explicit steps between consecutive sites (sorted by y then x) as g-deltas (type 10, or type 11 with
  the greatest common divisor of the steps as grid when it exceeds 1).

Layer and datatype are written once per tile (modal variables); every tile's records are compressed into CBLOCKs
(raw deflate at a fixed level, at most :data:`CBLOCK_MAX_BYTES` inflated each) and each tile starts from undefined
modal state, so tiles can be encoded in worker threads (:func:`encode_shape_groups`, :func:`pack_cblocks`) and
written in order by one thread. Cells other than the top one (rotation-level masters, write-field cells) are
spooled to an unnamed temporary file and copied out at the end; the CELLNAME table, the END record with its table
offsets and a CRC32 validation signature close the file. Same input, same bytes (no timestamps, no dictionaries
iterated in hash order); the SHA-256 of the file is computed while writing.

References
----------
SEMI P39, OASIS - Open Artwork System Interchange Standard: records START, END, CELLNAME, CELL, POLYGON, PLACEMENT,
CBLOCK; repetition types 1-11; point lists; modal variables; the 256-byte END record and its validation signature
(CRC32 over every byte up to and including the validation-scheme field, stored little-endian).
"""

from __future__ import annotations

import hashlib
import tempfile
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import OutputError
from metalay.io import _oasis_codec as oc
from metalay.io.writer import copy_spooled
from metalay.util.atomic import atomic_path

__all__ = [
    "OasisStream",
    "EncodedRecords",
    "encode_shape_groups",
    "encode_placements",
    "encode_polygons",
    "pack_cblocks",
    "DEFAULT_COMPRESSION_LEVEL",
    "CBLOCK_MAX_BYTES",
]

DEFAULT_COMPRESSION_LEVEL = 1
"""Deflate level of CBLOCKs (1: fastest; the repetitions already remove most redundancy)."""
CBLOCK_MAX_BYTES = 4 << 20
"""Inflated size of one CBLOCK (records are never split, so one larger record gets a CBLOCK of its own)."""
_LIMIT = oc.COORD_LIMIT


@dataclass(frozen=True)
class EncodedRecords:
    """OASIS records (uncompressed) that assume no modal state on entry.

    Attributes
    ----------
    data : ndarray (B,) uint8
        The records, back to back.
    ends : ndarray (R,) int64
        Byte offset just past each record (record boundaries, for splitting into CBLOCKs).
    polygons, placements : int
        Polygons and placements the records stand for (repetitions counted).
    """

    data: np.ndarray
    ends: np.ndarray
    polygons: int = 0
    placements: int = 0

    @staticmethod
    def empty() -> "EncodedRecords":
        return EncodedRecords(np.zeros(0, np.uint8), np.zeros(0, np.int64))


# ----------------------------------------------------------------------------------------------------------------
# Vectorised assembly helpers
# ----------------------------------------------------------------------------------------------------------------

def _ranges_gather(buf: np.ndarray, starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Concatenate ``buf[s:s + n]`` for every (s, n), in order, without a Python loop."""
    lengths = lengths.astype(np.int64)
    total = int(lengths.sum())
    before = np.cumsum(lengths) - lengths
    idx = np.repeat(starts.astype(np.int64) - before, lengths) + np.arange(total, dtype=np.int64)
    return buf[idx]


def _items_to_bytes(values: np.ndarray, owner: np.ndarray, n_owners: int) -> tuple[np.ndarray, np.ndarray,
                                                                                      np.ndarray]:
    """Encode unsigned items (ordered by ``owner``) and return (bytes, start, length) per owner."""
    data, lens = oc.encode_varints(values)
    per = np.bincount(owner, weights=lens, minlength=n_owners).astype(np.int64)
    return data, np.cumsum(per) - per, per


def _sorted_groups(group_of_site: np.ndarray, centres: np.ndarray, n_groups: int):
    """Site order by (group, y, x); first index and size of every group (empty groups have size 0)."""
    x, y = centres[:, 0], centres[:, 1]
    dy = np.diff(y)
    if n_groups <= 1 << 16 and np.all((dy > 0) | ((dy == 0) & (np.diff(x) >= 0))):
        # sites already in row order (as the lattice yields them): a stable radix sort by group suffices
        order = np.argsort(group_of_site.astype(np.uint16), kind="stable")
    else:
        lo = centres.min(axis=0)
        span = centres.max(axis=0) - lo + 1
        if n_groups * int(span[0]) * int(span[1]) < 2 ** 62:  # one int64 key sorts faster than a 3-key lexsort
            key = (group_of_site * span[1] + (y - lo[1])) * span[0] + (x - lo[0])
            order = np.argsort(key, kind="stable")
        else:
            order = np.lexsort((x, y, group_of_site))
    size = np.bincount(group_of_site, minlength=n_groups).astype(np.int64)
    return order, np.cumsum(size) - size, size


_BIG = np.int64(1) << 62


def _seg_min_max(v: np.ndarray, seg: np.ndarray, mask: np.ndarray | None = None):
    """Per-segment minimum and maximum of ``v`` (optionally only where ``mask``; empty -> (+BIG, -BIG))."""
    lo = v if mask is None else np.where(mask, v, _BIG)
    hi = v if mask is None else np.where(mask, v, -_BIG)
    return np.minimum.reduceat(lo, seg), np.maximum.reduceat(hi, seg)


def _repetitions(cx: np.ndarray, cy: np.ndarray, first: np.ndarray, size: np.ndarray) -> tuple:
    """Repetition fields of every group of sorted sites (``cx``, ``cy``: (N,) int64; groups of ``size`` >= 1 sites
    from ``first``), vectorised over groups and sites with segment reductions.

    Returns two pieces (header, explicit steps), each (bytes, start (G,), length (G,)); a single site gets none.
    """
    g_n, n = size.shape[0], cx.shape[0]
    own = np.ones(max(n - 1, 0), bool)
    own[first[1:] - 1] = False  # the step into a group's first site belongs to no group
    sx = np.diff(cx)[own]  # group g's own steps: [first[g] - g, first[g] - g + size[g] - 1)
    sy = np.diff(cy)[own]
    sfirst = first - np.arange(g_n)
    ns = size - 1
    mg = np.flatnonzero(ns > 0)
    seg = sfirst[mg]
    line = np.zeros(g_n, bool)
    d1 = np.zeros((g_n, 2), np.int64)
    if mg.size:
        mnx, mxx = _seg_min_max(sx, seg)
        mny, mxy = _seg_min_max(sy, seg)
        line[mg] = (mnx == mxx) & (mny == mxy)  # one constant step: a 1-D lattice
        d1[mg, 0], d1[mg, 1] = mnx, mny
        grid, nx, a, b = _grids(sx, sy, seg, mg, size, ~line[mg] & (mny == 0) & (mxy > 0) & (size[mg] >= 4))
    else:
        grid, nx, a, b = np.zeros(g_n, bool), np.zeros(g_n, np.int64), d1, d1
    explicit = (ns > 0) & ~line & ~grid
    nb = np.where(explicit, ns, 0)
    if not explicit.all():
        sel = np.repeat(explicit, ns)
        sx, sy = sx[sel], sy[sel]
    bfirst = np.cumsum(nb) - nb
    g, divided = _common_step(sx, sy, bfirst, nb)
    head = _repetition_headers(size, d1, line, grid, nx, a, b, explicit, g)
    data, lens = oc.encode_gdeltas(*divided)
    per = np.zeros(g_n, np.int64)
    if explicit.any():
        per[explicit] = np.add.reduceat(lens, bfirst[explicit])
    return head, (data, np.cumsum(per) - per, per)


def _grids(sx, sy, seg, mg, size, pre):
    """Groups whose sites form an nx x ny grid with horizontal rows (constant x step within rows, one constant
    step from a row's last site to the next row's first, rows of equal length): (is_grid, nx, a, b)."""
    g_n = size.shape[0]
    grid = np.zeros(g_n, bool)
    nx = np.zeros(g_n, np.int64)
    a = np.zeros((g_n, 2), np.int64)
    b = np.zeros((g_n, 2), np.int64)
    if not pre.any():
        return grid, nx, a, b
    row = sy != 0
    wmin, wmax = _seg_min_max(sx, seg, ~row)
    ok = pre & (wmin == wmax) & (wmin > 0) & (wmin < _BIG)
    if not ok.any():
        return grid, nx, a, b
    rxmin, rxmax = _seg_min_max(sx, seg, row)
    rymin, rymax = _seg_min_max(sy, seg, row)
    n_rows = np.add.reduceat(row, seg).astype(np.int64) + 1
    ok &= (rxmin == rxmax) & (rymin == rymax) & (rymin > 0) & (size[mg] % n_rows == 0)
    for k in np.flatnonzero(ok):  # candidates only (rare): rows of equal length, checked exactly
        gi = mg[k]
        ncols = size[gi] // n_rows[k]
        r = row[seg[k]:seg[k] + size[gi] - 1]
        if ncols >= 2 and np.array_equal(np.flatnonzero(r), np.arange(ncols - 1, size[gi] - 1, ncols)):
            grid[gi], nx[gi] = True, ncols
            a[gi] = (wmin[k], 0)
            b[gi] = (rxmin[k] + (ncols - 1) * wmin[k], rymin[k])
    return grid, nx, a, b


def _common_step(sx, sy, bfirst, nb):
    """A common factor of the explicit steps (repetition type 11): returns the grid per group (1 = none) and the
    steps divided by it.

    The candidate is the gcd, over groups, of the gcd of each group's first four steps (skipping groups where that
    is 1: a lattice pitch shared by the tile); it is kept for every group whose steps it all divides.
    """
    g_n = nb.shape[0]
    g = np.ones(g_n, np.int64)
    has = np.flatnonzero(nb > 0)
    if has.size == 0:
        return g, (sx, sy)
    probe = bfirst[has, None] + np.minimum(np.arange(4)[None, :], nb[has, None] - 1)
    gc = np.gcd.reduce(np.abs(np.concatenate([sx[probe], sy[probe]], axis=1)), axis=1)
    g0 = int(np.gcd.reduce(gc[gc > 1])) if (gc > 1).any() else 1
    if g0 <= 1:
        return g, (sx, sy)
    qx, qy = sx // g0, sy // g0
    bad = (qx * g0 != sx) | (qy * g0 != sy)
    nbad = np.add.reduceat(bad, bfirst[has])
    g[has[nbad == 0]] = g0
    if (nbad == 0).all():
        return g, (qx, qy)
    keep = np.repeat(g > 1, nb)
    return g, (np.where(keep, qx, sx), np.where(keep, qy, sy))


def _repetition_headers(size, d1, line, grid, nx, a, b, explicit, g):
    """Header items of every repetition (type, dimensions, spaces or lattice g-deltas, grid), as bytes per group."""
    g_n = size.shape[0]
    cols = np.zeros((g_n, 8), np.uint64)
    ncol = np.zeros(g_n, np.int64)
    ny = np.where(grid, size // np.maximum(nx, 1), 0)
    horiz = line & (d1[:, 0] > 0) & (d1[:, 1] == 0)
    vert = line & (d1[:, 0] == 0) & (d1[:, 1] > 0)
    for sel, t, fields in ((horiz, 2, (size - 2, d1[:, 0])), (vert, 3, (size - 2, d1[:, 1])),
                           (grid & (b[:, 0] == 0), 1, (nx - 2, ny - 2, a[:, 0], b[:, 1])),
                           (explicit & (g == 1), 10, (size - 2,)), (explicit & (g > 1), 11, (size - 2, g)),
                           (line & ~horiz & ~vert, 9, (size - 2,)), (grid & (b[:, 0] != 0), 8, (nx - 2, ny - 2))):
        idx = np.flatnonzero(sel)
        if idx.size == 0:
            continue
        cols[idx, 0] = t
        for k, f in enumerate(fields):
            cols[idx, k + 1] = f[idx].astype(np.uint64)
        ncol[idx] = 1 + len(fields)
        for v in {9: (d1,), 8: (a, b)}.get(t, ()):  # g-deltas in the header: one or two items each
            vals, owner = oc.gdelta_items(v[idx, 0], v[idx, 1])
            second = np.r_[False, owner[1:] == owner[:-1]]
            cols[idx[owner], ncol[idx[owner]] + second] = vals
            ncol[idx] += np.bincount(owner, minlength=idx.size)
    rows = np.repeat(np.arange(g_n), ncol)
    local = np.arange(rows.shape[0]) - np.repeat(np.cumsum(ncol) - ncol, ncol)
    return _items_to_bytes(cols[rows, local], rows, g_n)


def _check_range(*arrays, where="OASIS"):
    reach = sum(max(-int(np.min(a, initial=0)), int(np.max(a, initial=0))) for a in arrays)
    if reach >= _LIMIT:
        raise OutputError(f"{where}: coordinates beyond +-2**52 database units")


def _assemble(pieces) -> EncodedRecords:
    """Records made of ``pieces`` in order: each piece is (bytes, start (G,), length (G,)); record g is the
    concatenation of ``bytes[start[g]:start[g] + length[g]]`` over the pieces."""
    bufs = [np.asarray(p[0], np.uint8) for p in pieces]
    base = np.cumsum([0] + [buf.shape[0] for buf in bufs[:-1]])
    starts = np.stack([base[i] + np.asarray(p[1], np.int64) for i, p in enumerate(pieces)], axis=1)
    lens = np.stack([np.asarray(p[2], np.int64) for p in pieces], axis=1)
    data = _ranges_gather(np.concatenate(bufs), starts.ravel(), lens.ravel())
    return EncodedRecords(data, np.cumsum(lens.sum(axis=1)))


def _head_pieces(rid: int, info_single: int, info_rep: int, prefix: bytes, has_rep: np.ndarray) -> list:
    """Record id and info byte (R bit where a repetition follows), and ``prefix`` after the first record's info
    byte (its layer and datatype), with the L and D bits set there."""
    g_n = has_rep.shape[0]
    heads = np.array([rid, info_single, rid, info_rep, rid, info_single | 3, rid, info_rep | 3], np.uint8)
    variant = has_rep.astype(np.int64)
    if prefix:
        variant[0] += 2
    lens = np.zeros(g_n, np.int64)
    lens[0] = len(prefix)
    return [(heads, 2 * variant, np.full(g_n, 2)), (np.frombuffer(prefix, np.uint8), np.zeros(g_n, np.int64), lens)]


def _xy_piece(pos: np.ndarray) -> tuple:
    data, lens = oc.encode_varints(oc.sint_to_uint(pos.reshape(-1)))
    per = lens.reshape(-1, 2).sum(axis=1)
    return data, np.cumsum(per) - per, per


# ----------------------------------------------------------------------------------------------------------------
# Pure encoders (usable in worker threads)
# ----------------------------------------------------------------------------------------------------------------

def encode_shape_groups(layer: int, datatype: int, shapes_db: np.ndarray, shape_of_site: np.ndarray,
                        centres_db: np.ndarray, *, where: str = "OASIS") -> EncodedRecords:
    """POLYGON records for one tile: one record per distinct shape, placed at its first site, with a repetition.

    Parameters
    ----------
    layer, datatype : int
        Layer and datatype of every polygon (0 <= value < 2**31).
    shapes_db : ndarray (S, V, 2) int
        Distinct snapped outlines, vertex offsets from the site centre (database units), V >= 3.
    shape_of_site : ndarray (N,) int
        Index into ``shapes_db`` of each site (as :func:`metalay.mask.layout.group_shapes` returns it).
    centres_db : ndarray (N, 2) int
        Integer site centres (database units).

    Returns
    -------
    EncodedRecords
        Polygon vertex ``v`` of site ``i`` is ``centres_db[i] + shapes_db[shape_of_site[i], v]``, exactly, in the
        same vertex order.

    Notes
    -----
    The point list is type 4 (g-deltas from vertex 0, which is the record's position; the closing edge is
    implied). Sites are sorted by (shape, y, x) before the steps are taken, so the output depends only on the set
    of (shape, centre) pairs.
    """
    shapes = np.asarray(shapes_db, dtype=np.int64)
    idx = np.asarray(shape_of_site, dtype=np.int64).ravel()
    cen = np.asarray(centres_db, dtype=np.int64).reshape(-1, 2)
    if idx.shape[0] == 0:
        return EncodedRecords.empty()
    s_n, nv = shapes.shape[0], shapes.shape[1]
    if nv < 3 or idx.shape[0] != cen.shape[0] or idx.min() < 0 or idx.max() >= s_n:
        raise OutputError(f"{where}: shape groups need V >= 3 vertices and one valid shape index per site")
    _check_range(cen, shapes, where=where)
    order, first, size = _sorted_groups(idx, cen, s_n)
    used = np.flatnonzero(size)
    cx, cy = cen[:, 0][order], cen[:, 1][order]
    first, size = first[used], size[used]
    # point lists of the shapes used: [type 4][V - 1] then V - 1 g-deltas from vertex 0
    steps = np.diff(shapes[used], axis=1).reshape(-1, 2)
    vals, own = oc.gdelta_items(steps[:, 0], steps[:, 1])
    pl_head = np.frombuffer(oc.uint_bytes(4) + oc.uint_bytes(nv - 1), np.uint8)
    g_n = used.size
    rep_head, rep_body = _repetitions(cx, cy, first, size)
    pos = np.stack([cx[first], cy[first]], axis=1) + shapes[used, 0]
    pieces = _head_pieces(oc.POLYGON, 0x38, 0x3C, oc.uint_bytes(layer) + oc.uint_bytes(datatype), size > 1)
    pieces += [(pl_head, np.zeros(g_n, np.int64), np.full(g_n, pl_head.shape[0])),
               _items_to_bytes(vals, own // (nv - 1), g_n), _xy_piece(pos), rep_head, rep_body]
    enc = _assemble(pieces)
    return EncodedRecords(enc.data, enc.ends, polygons=int(idx.shape[0]))


def encode_placements(refnums, cell_of_site: np.ndarray, centres_db: np.ndarray, *,
                      where: str = "OASIS") -> EncodedRecords:
    """PLACEMENT records (no rotation, no magnification): cell ``refnums[cell_of_site[i]]`` at ``centres_db[i]``.

    One record per cell (at its first site, sorted by y then x) with a repetition for the others, chosen as in
    :func:`encode_shape_groups`. ``refnums`` are CELLNAME reference numbers (:meth:`OasisStream.refnum`).
    """
    refs = np.asarray(refnums, dtype=np.int64).ravel()
    idx = np.asarray(cell_of_site, dtype=np.int64).ravel()
    cen = np.asarray(centres_db, dtype=np.int64).reshape(-1, 2)
    if idx.shape[0] == 0:
        return EncodedRecords.empty()
    if idx.shape[0] != cen.shape[0] or idx.min() < 0 or idx.max() >= refs.shape[0]:
        raise OutputError(f"{where}: placements need one valid cell index per site")
    _check_range(cen, where=where)
    order, first, size = _sorted_groups(idx, cen, refs.shape[0])
    used = np.flatnonzero(size)
    cx, cy = cen[:, 0][order], cen[:, 1][order]
    first, size = first[used], size[used]
    rep_head, rep_body = _repetitions(cx, cy, first, size)
    # info CNXYRAAF: explicit cell by reference number, x and y present, angle 0, no flip
    pieces = _head_pieces(oc.PLACEMENT, 0xF0, 0xF8, b"", size > 1)
    pieces += [_items_to_bytes(refs[used].astype(np.uint64), np.arange(used.size), used.size),
               _xy_piece(np.stack([cx[first], cy[first]], axis=1)), rep_head, rep_body]
    enc = _assemble(pieces)
    return EncodedRecords(enc.data, enc.ends, placements=int(idx.shape[0]))


def _point_list(xy: np.ndarray) -> bytes:
    """Type 2 (2-deltas) when every edge, the closing one too, is axis-parallel; otherwise type 4 (g-deltas)."""
    closed = np.concatenate([xy, xy[:1]])
    e = np.diff(closed, axis=0)
    steps = e[:-1]
    if np.all((e[:, 0] == 0) | (e[:, 1] == 0)):
        direction = np.where(steps[:, 1] == 0, np.where(steps[:, 0] >= 0, 0, 2), np.where(steps[:, 1] > 0, 1, 3))
        mag = np.abs(steps).sum(axis=1)
        return oc.uint_bytes(2) + oc.uint_bytes(len(steps)) + b"".join(
            oc.uint_bytes((int(m) << 2) | int(k)) for m, k in zip(mag, direction))
    return oc.uint_bytes(4) + oc.uint_bytes(len(steps)) + b"".join(oc.gdelta_bytes(dx, dy) for dx, dy in steps)


def encode_polygons(polygons, *, where: str = "OASIS") -> EncodedRecords:
    """POLYGON records for a few individual polygons (frame, label, marks, master outlines), in the given order.

    ``polygons`` is a sequence of objects with ``layer``, ``datatype`` and ``xy_db`` ((V, 2) int, V >= 3), like
    :class:`metalay.mask.layout.Polygon`. Layer and datatype are written only when they change.
    """
    out = bytearray()
    ends = []
    last = (None, None)
    for p in polygons:  # a handful of polygons, not sites
        xy = np.asarray(p.xy_db, dtype=np.int64).reshape(-1, 2)
        if xy.shape[0] < 3:
            raise OutputError(f"{where}: a polygon needs at least 3 vertices (got {xy.shape[0]})")
        _check_range(xy, where=where)
        ld = (int(p.layer), int(p.datatype))
        info = 0x38 | (1 if ld[0] != last[0] else 0) | (2 if ld[1] != last[1] else 0)
        out += bytes((oc.POLYGON, info))
        if info & 1:
            out += oc.uint_bytes(ld[0])
        if info & 2:
            out += oc.uint_bytes(ld[1])
        out += _point_list(xy) + oc.sint_bytes(int(xy[0, 0])) + oc.sint_bytes(int(xy[0, 1]))
        last = ld
        ends.append(len(out))
    return EncodedRecords(np.frombuffer(bytes(out), np.uint8), np.array(ends, np.int64), polygons=len(ends))


def pack_cblocks(enc: EncodedRecords, *, level: int = DEFAULT_COMPRESSION_LEVEL,
                 max_bytes: int = CBLOCK_MAX_BYTES) -> bytes:
    """Wrap records into CBLOCK records (raw deflate, ``level`` 1-9), each inflating to at most ``max_bytes``
    unless a single record is larger; ``level`` 0 returns the records uncompressed."""
    data = enc.data
    if data.shape[0] == 0:
        return b""
    if level == 0:
        return data.tobytes()
    out = bytearray()
    lo = 0
    ends = enc.ends
    while lo < data.shape[0]:
        k = int(np.searchsorted(ends, lo + max_bytes, side="right"))
        hi = int(ends[k - 1]) if k > 0 and ends[k - 1] > lo else int(ends[np.searchsorted(ends, lo, side="right")])
        comp = zlib.compressobj(level, zlib.DEFLATED, -15)
        packed = comp.compress(memoryview(data[lo:hi])) + comp.flush()
        out += bytes((oc.CBLOCK, 0)) + oc.uint_bytes(hi - lo) + oc.uint_bytes(len(packed)) + packed
        lo = hi
    return bytes(out)


# ----------------------------------------------------------------------------------------------------------------
# The stream
# ----------------------------------------------------------------------------------------------------------------

def _check_name(name: str, where: str) -> bytes:
    raw = name.encode("ascii", errors="replace") if isinstance(name, str) else bytes(name)
    if not raw or min(raw) < 0x21 or max(raw) > 0x7E or (isinstance(name, str) and not name.isascii()):
        raise OutputError(f"{where}: cell name {name!r} is not allowed in OASIS (allowed: 1 or more printable "
                          "ASCII characters 0x21-0x7E, no spaces)")
    return raw


class OasisStream:
    """Write an OASIS file tile by tile; the file appears at ``path`` only when the ``with`` block succeeds.

    Parameters
    ----------
    path : str or Path
        Output file (written to a temporary name beside it, fsynced, renamed).
    top_cell : str
        Name of the top cell (CELLNAME reference number 0); content without ``cell=`` goes there.
    db_unit_nm : float
        Database unit in nm (START ``unit`` = 1000 / db_unit_nm grid steps per micron).
    compression_level : int
        Deflate level 0-9 of the CBLOCKs (0: no CBLOCK).
    validation : {"crc32", "checksum32", "none"}
        Validation signature in the END record.

    Attributes
    ----------
    sha256 : str or None
        SHA-256 (hex) of the whole file, set when the block ends without error.
    polygon_count, placement_count : int
        Polygons and placements written (repetitions counted; geometry inside placed cells counted once).

    Examples
    --------
    >>> from metalay.mask.layout import group_shapes                                  # doctest: +SKIP
    >>> with OasisStream("mask.oas", "TOP", db_unit_nm=1.0) as oas:              # doctest: +SKIP
    ...     for centres, offsets in tiles:                                       # (N, 2), (N, V, 2) int
    ...         g = group_shapes(offsets)
    ...         oas.add_shape_groups(1, 0, g.shapes_db, g.shape_of_site, centres)
    ...     oas.add_polygons(frame)
    >>> oas.sha256                                                               # doctest: +SKIP
    """

    def __init__(self, path, top_cell: str, *, db_unit_nm: float = 1.0,
                 compression_level: int = DEFAULT_COMPRESSION_LEVEL, validation: str = "crc32"):
        self.path = Path(path)
        self.db_unit_nm = float(db_unit_nm)
        if not 0 <= int(compression_level) <= 9:
            raise OutputError(f"{self.path}: compression_level {compression_level} (allowed: 0-9)")
        if validation not in ("crc32", "checksum32", "none"):
            raise OutputError(f"{self.path}: validation {validation!r} (allowed: crc32, checksum32, none)")
        if not (self.db_unit_nm > 0 and 1000.0 / self.db_unit_nm < 2 ** 53):
            raise OutputError(f"{self.path}: db_unit_nm {db_unit_nm} (allowed: > 0)")
        self.level = int(compression_level)
        self.validation = validation
        self.sha256 = None
        self.polygon_count = 0
        self.placement_count = 0
        self._names: list[bytes] = []
        self._refs: dict[str, int] = {}
        self._defined: set[int] = set()
        self._placed: set[int] = set()
        self._spooled: dict[int, list[tuple[int, int]]] = {}
        self._top = self.refnum(top_cell)
        self._defined.add(self._top)
        self._ctx = self._fh = self._spool = None
        self._pos = 0
        self._hash = hashlib.sha256()
        self._crc = 0
        self._sum = 0

    # ------------------------------------------------------------------ low level

    def _write(self, data) -> None:
        view = memoryview(data).cast("B")
        self._fh.write(view)
        self._hash.update(view)
        if self.validation == "crc32":
            self._crc = zlib.crc32(view, self._crc)
        elif self.validation == "checksum32":
            self._sum = (self._sum + int(np.frombuffer(view, np.uint8).sum(dtype=np.uint64))) & 0xFFFFFFFF
        self._pos += view.nbytes

    def __enter__(self):
        self._ctx = atomic_path(self.path)
        tmp = self._ctx.__enter__()
        try:
            self._fh = open(tmp, "wb", buffering=8 << 20)
            unit = 1000.0 / self.db_unit_nm
            self._write(oc.MAGIC + bytes((oc.START,)) + oc.string_bytes(b"1.0") + oc.real_bytes(unit)
                        + oc.uint_bytes(1) + bytes((oc.CELL_REF,)) + oc.uint_bytes(self._top))
        except BaseException as exc:
            self._abort(exc)
            raise
        return self

    def refnum(self, name: str) -> int:
        """CELLNAME reference number of ``name`` (assigned on first use, in order)."""
        ref = self._refs.get(name)
        if ref is None:
            self._names.append(_check_name(name, str(self.path)))
            ref = self._refs[name] = len(self._names) - 1
        return ref

    def _target(self, cell):
        return self._top if cell is None else self.refnum(cell)

    def write_encoded(self, enc: EncodedRecords, *, cell: str | None = None) -> None:
        """Compress and write records made by an ``encode_*`` function into ``cell`` (default: the top cell)."""
        self.write_packed(pack_cblocks(enc, level=self.level), cell=cell, polygons=enc.polygons,
                          placements=enc.placements)

    def write_packed(self, blob: bytes, *, cell: str | None = None, polygons: int = 0, placements: int = 0,
                     placed=()) -> None:
        """Write records already packed by :func:`pack_cblocks` (e.g. in a worker thread) into ``cell``.

        ``placed`` names the cells the records place (their reference numbers were taken from :meth:`refnum`
        beforehand); each must be defined before the stream closes.
        """
        ref = self._target(cell)
        self._placed.update(self.refnum(c) for c in placed)
        self._defined.add(ref)
        self.polygon_count += polygons
        self.placement_count += placements
        if not blob:
            return
        if ref == self._top:
            self._write(blob)
            return
        if self._spool is None:
            self._spool = tempfile.TemporaryFile(dir=self.path.parent)
        off = self._spool.seek(0, 2)
        self._spool.write(blob)
        self._spooled.setdefault(ref, []).append((off, len(blob)))

    # ------------------------------------------------------------------ content

    def add_shape_groups(self, layer: int, datatype: int, shapes_db, shape_of_site, centres_db, *,
                         cell: str | None = None) -> None:
        """Write one tile of elements grouped by exact shape (see :func:`encode_shape_groups`)."""
        self.write_encoded(encode_shape_groups(layer, datatype, shapes_db, shape_of_site, centres_db,
                                               where=str(self.path)), cell=cell)

    def add_polygons(self, polygons, *, cell: str | None = None) -> None:
        """Write a few individual polygons (frame, label, marks) into ``cell`` (default: the top cell)."""
        self.write_encoded(encode_polygons(list(polygons), where=str(self.path)), cell=cell)

    def define_cell(self, name: str, polygons=()) -> None:
        """Define cell ``name`` with these polygons (a rotation-level master, say); more may be added later."""
        self.add_polygons(polygons, cell=name)

    def add_placements(self, cells, cell_of_site, centres_db, *, cell: str | None = None) -> None:
        """Place cell ``cells[cell_of_site[i]]`` at ``centres_db[i]`` (no rotation), grouped with repetitions."""
        refs = [self.refnum(c) for c in cells]
        self._placed.update(refs)
        self.write_encoded(encode_placements(refs, cell_of_site, centres_db, where=str(self.path)), cell=cell)

    def place(self, name: str, x_db: int = 0, y_db: int = 0, *, cell: str | None = None) -> None:
        """Place cell ``name`` once at (x_db, y_db)."""
        self.add_placements([name], np.zeros(1, np.int64), np.array([[x_db, y_db]], np.int64), cell=cell)

    # ------------------------------------------------------------------ closing

    def _finish(self) -> None:
        missing = sorted(self._names[r].decode() for r in self._placed - self._defined)
        if missing:
            raise OutputError(f"{self.path}: cell(s) placed but never defined: {', '.join(missing[:10])}")
        for ref in sorted(self._defined - {self._top}):  # other cells in reference-number order
            self._write(bytes((oc.CELL_REF,)) + oc.uint_bytes(ref))
            copy_spooled(self._spool, self._spooled.get(ref, []), self._write, self.path)
        table = self._pos
        self._write(b"".join(bytes((oc.CELLNAME,)) + oc.string_bytes(n) for n in self._names))
        end = bytearray((oc.END,))
        end += oc.uint_bytes(1) + oc.uint_bytes(table) + bytes((1, 0)) * 5
        scheme = {"none": 0, "crc32": 1, "checksum32": 2}[self.validation]
        room = oc.END_RECORD_BYTES - len(end) - 1 - (4 if scheme else 0)  # for the padding string
        pad = room - 1
        while len(oc.uint_bytes(pad)) + pad > room:  # its length field may take two bytes
            pad -= 1
        end += oc.uint_bytes(pad) + bytes(pad) + oc.uint_bytes(scheme)
        self._write(end)
        if scheme == 1:
            self._write((self._crc & 0xFFFFFFFF).to_bytes(4, "little"))
        elif scheme == 2:
            self._write(self._sum.to_bytes(4, "little"))
        self.sha256 = self._hash.hexdigest()

    def _abort(self, exc) -> None:
        for fh in (self._fh, self._spool):
            if fh is not None:
                fh.close()
        self._ctx.__exit__(type(exc), exc, exc.__traceback__)

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                self._finish()
        except BaseException as err:
            self._abort(err)
            raise
        for fh in (self._fh, self._spool):
            if fh is not None:
                fh.close()
        return self._ctx.__exit__(exc_type, exc, tb)
