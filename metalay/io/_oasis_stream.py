"""OASIS as a stream of polygon pieces: the OASIS side of :mod:`metalay.io.stream_read`.

The whole read (:func:`metalay.io.oasis_read.parse_oasis`) expands every cell's own geometry while parsing; here
nothing is expanded before it is yielded, in two passes over the file:

1. Survey: the parser of :mod:`metalay.io.oasis_read` runs over the whole file in its ``"count"`` mode. Every
   record is read and checked as in the whole read (point lists and explicit repetitions decoded region by region
   and dropped, CBLOCKs inflated one at a time, the END record and its validation signature verified), every
   repetition counted as an exact int before anything exists, the own polygons and vertices admitted against
   ``max_elements`` / ``max_vertices``; what is kept is a small table per cell: where its CELL record is (the
   enclosing CBLOCK's offset and the offset inside it), its own polygon and vertex counts, and per placed child
   the number of placements.
2. Stream: the hierarchy is checked and counted by the whole read's own functions (:mod:`metalay.io.gdsread`:
   undefined and cyclic placements, depth, flattened totals), then each cell holding polygons is parsed again
   from its CELL record (modal variables reset there, so the parse is the same) in its ``"geometry"`` mode: the
   records are queued and, every few thousand records or few MB of bytes, their runs decoded and their polygons
   expanded lazily (a repetition a slice of positions at a time). Placements are read again the same way from
   the parent cells (``"placements"`` mode, one record with its repetition at a time) and composed with the
   parents' placements in blocks, in the order of the whole read.

Memory: the per-cell table; a CBLOCK (at most the memory budget, 4 MB as metalay writes them) and the decoded
runs of a few MB of records; one placement record's positions; the geometry of a placed cell when it has at most
:data:`HOLD_VERTICES` vertices (else the cell is parsed again for every placement); the yielded chunks. Nothing
grows with the number of polygons of the file.
"""

from __future__ import annotations

import mmap
import os
from dataclasses import dataclass

import numpy as np

from metalay.errors import MaskReadError
from metalay.io import _oasis_codec as oc
from metalay.io import oasis_read as orr
from metalay.util.budget import memory_budget

__all__ = ["Survey", "release_pages", "open_oasis", "survey", "walk_cell", "instances", "cell_pieces", "rechunk",
           "iter_pieces", "HOLD_VERTICES", "HOLD_PLACEMENTS", "DRAIN_RECORDS", "DRAIN_BYTES", "INSTANCE_BLOCK"]

HOLD_VERTICES = 1 << 22
"""A placed cell with at most this many own vertices is expanded once and held (64 MB of int64 vertices)."""
DRAIN_RECORDS = 4096
"""Queued geometry or placement records decoded and expanded together."""
DRAIN_BYTES = 4 << 20
"""Bytes of records parsed between two drains (bounds the decoded runs held)."""
INSTANCE_BLOCK = 1 << 16
"""Placements (affine maps, 48 bytes each) composed at a time."""
HOLD_PLACEMENTS = 1 << 20
"""A cell making at most this many placements keeps its placement records once read (else they are read again
for every child they place)."""

_IDENT = np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])
_STOP = {oc.CELL_REF, oc.CELL_NAMED, oc.END, oc.LAYERNAME_GEOMETRY, oc.LAYERNAME_TEXT, *orr._NAME_KINDS}


@dataclass(frozen=True)
class _Ref:
    """All placements of one child by one cell, counted (the survey keeps no positions)."""

    child: str
    count: int
    offset: int


@dataclass
class _SurveyCell:
    name: str
    loc: tuple
    own: tuple
    refs: list

    def own_counts(self) -> tuple:
        return self.own


@dataclass
class Survey:
    """What the survey keeps: units, the per-cell table, the name table, and how to parse the file again."""

    path: str
    fmt: str
    db_unit_m: float
    user_unit_m: float
    cells: dict
    names: dict
    buf: object
    keep: object
    budget: int
    held: tuple = (None, None)  # the last parent read with few placements (HOLD_PLACEMENTS): (name, records)
    block: tuple = (None, None)  # the last CBLOCK inflated: (offset, bytes)

    def resolve(self, key, offset: int) -> str:
        """Cell name of a CELL or PLACEMENT key ``("name", str)`` or ``("ref", int)``."""
        if key[0] == "name":
            return key[1]
        if key[1] not in self.names:
            raise MaskReadError(f"{self.path}: OASIS byte {offset}: cell reference number {key[1]} has no CELLNAME "
                                "record")
        return self.names[key[1]]


def release_pages(mm, start: int, stop: int) -> None:
    """Drop the pages of ``mm[start:stop]`` from this process's resident set (they stay in the page cache: the
    file is only read, so they are clean); a no-op where ``madvise`` is missing."""
    if mm is None or not hasattr(mm, "madvise") or not hasattr(mmap, "MADV_DONTNEED"):
        return
    page = mmap.PAGESIZE
    lo = (start // page) * page
    hi = min(len(mm), -(-stop // page) * page)
    if hi > lo:
        try:
            mm.madvise(mmap.MADV_DONTNEED, lo, hi - lo)
        except (OSError, ValueError):  # pragma: no cover - best effort
            pass


def open_oasis(path: str):
    """Map the file read-only (the same refusals as :func:`metalay.io.oasis_read.parse_oasis`)."""
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise MaskReadError(f"{path}: cannot open ({exc.strerror or exc})") from exc
    with fh:
        if os.fstat(fh.fileno()).st_size == 0:
            raise MaskReadError(f"{path}: OASIS: empty file")
        try:
            return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
        except (ValueError, OSError) as exc:
            raise MaskReadError(f"{path}: cannot map file ({exc})") from exc


def _parser(path: str, buf, keep, budget: int, mode: str, max_elements: int, max_vertices: int):
    return orr._Parser(path, buf, keep=keep, max_elements=max_elements, max_vertices=max_vertices,
                       max_memory_bytes=budget, circle_tolerance_db=orr.DEFAULT_CIRCLE_TOLERANCE_DB, mode=mode)


def survey(path: str, buf, keep, *, max_elements: int, max_vertices: int) -> Survey:
    """Pass 1: parse and check the whole file without expanding anything; the per-cell table."""
    budget = memory_budget(None)
    p = _parser(path, buf, keep, budget, "count", max_elements, max_vertices)
    p.release = lambda lo, hi: release_pages(buf, lo, hi)  # CBLOCKs read: their file pages can go
    p.run()
    names = p.names["CELLNAME"]
    sv = Survey(path, "OASIS", float(f"{1e-6 / p.unit:.15g}"), 1e-6, {}, names, buf, keep, budget)
    for b in p.cells:
        name = sv.resolve(b.key, b.offset)
        if name in sv.cells:
            raise MaskReadError(f"{path}: OASIS byte {b.offset}: cell {name!r} defined twice")
        refs = [_Ref(sv.resolve(k, off), int(n), off) for k, (n, off) in b.children.items()]
        sv.cells[name] = _SurveyCell(name, b.loc, (b.own_p, b.own_v), refs)
    return sv


# ----------------------------------------------------------------------------------------------------------------
# Pass 2: one cell parsed again from its CELL record
# ----------------------------------------------------------------------------------------------------------------

def walk_cell(sv: Survey, name: str, mode: str, child: str | None = None):
    """Yield the geometry pieces ``(layer, datatype, counts, xy)`` (``mode="geometry"``) or the
    :class:`~metalay.io.oasis_read.Placement` records (``mode="placements"``; only those of ``child`` if given,
    the others' repetitions not decoded) of one cell, in file order."""
    p = _parser(sv.path, sv.buf, sv.keep, sv.budget, mode, 1 << 62, 1 << 62)
    if child is not None:
        p.target = {("name", child)} | {("ref", k) for k, v in sv.names.items() if v == child}
    block_at, at = sv.cells[name].loc
    top = oc.Cursor(sv.buf, sv.path, at if block_at is None else block_at)
    if block_at is not None:
        top.uint()  # the CBLOCK record id
        inner = oc.Cursor(_inflate(sv, p, top, block_at), sv.path, at,
                          where=lambda q: f"byte {q} inside the CBLOCK at byte {block_at}")
        if (yield from _walk_records(sv, p, inner, False)):
            return
    yield from _walk_records(sv, p, top, True)


def _inflate(sv: Survey, p, cur, at: int) -> bytes:
    """A CBLOCK's bytes (the cursor moved past it); the last one is kept, as cells defined one after the other
    in the same CBLOCK are read one after the other."""
    if sv.block[0] == at:
        cur.uint(), cur.uint()
        n_in = cur.uint()
        cur.pos += n_in
        return sv.block[1]
    out = p.inflate(cur, at)
    sv.block = (at, out)
    return out


def _placements_of(sv: Survey, parent: str, child: str):
    """The placement records of ``parent`` that place ``child``, in file order."""
    src = sv.held[1] if sv.held[0] == parent else None
    if src is None and sum(r.count for r in sv.cells[parent].refs) <= HOLD_PLACEMENTS:
        src = list(walk_cell(sv, parent, "placements"))  # kept for the next children of the same parent
        sv.held = (parent, src)
    return (pl for pl in (walk_cell(sv, parent, "placements", child) if src is None else src) if pl.child == child)


def _walk_records(sv: Survey, p, cur, top: bool):
    """Records of the cell from the cursor on, drained in bounded pieces; True once the cell has ended."""
    mark = cur.pos
    while cur.pos < cur.end:
        at = cur.pos
        if cur.buf[at] == oc.PAD:
            orr._skip_zeros(cur)
            continue
        rid = cur.uint()
        if rid in _STOP and (p.cell is not None or rid == oc.END):  # the next cell, a name record or the end
            yield from _drain(sv, p)
            return True
        if rid == oc.CBLOCK and top:
            yield from _drain(sv, p)  # runs are decoded from their own buffer: before the next one
            data = _inflate(sv, p, cur, at)
            release_pages(sv.buf, at, cur.pos)  # read: its file pages can go (they stay in the page cache)
            inner = oc.Cursor(data, sv.path, where=lambda q, a=at: f"byte {q} inside the CBLOCK at byte {a}")
            if (yield from _walk_records(sv, p, inner, False)):
                return True
            mark = cur.pos
            continue
        handler = p.handlers.get(rid)
        if handler is None:
            cur.fail(f"unexpected record id {rid} (the file changed since it was read?)", at)
        handler(cur, at, rid)
        queued = len(p.entries) + (len(p.cell.placements) if p.cell is not None else 0)
        if queued >= DRAIN_RECORDS or cur.pos - mark >= DRAIN_BYTES:
            yield from _drain(sv, p)
            mark = cur.pos
    yield from _drain(sv, p)
    return False


def _drain(sv: Survey, p):
    """Decode the queued runs, then yield the queued geometry (expanded lazily) or placements."""
    p.resolve()
    entries, p.entries = p.entries, []
    for _cell, piece in orr._iter_expand(entries):
        yield piece
    if p.cell is None or not p.cell.placements:
        return
    queued, p.cell.placements = p.cell.placements, []
    for child, x, y, lin, rep, off in queued:
        rep = rep.value if isinstance(rep, orr._Pending) else rep
        yield orr.Placement(sv.resolve(child, off), x, y, lin, rep, off)


# ----------------------------------------------------------------------------------------------------------------
# Placements composed in blocks, in the order of the whole read
# ----------------------------------------------------------------------------------------------------------------

def _affine_slice(pl, lo: int, hi: int) -> np.ndarray:
    """Rows ``lo:hi`` of ``pl.affine()`` without making the others."""
    offs = np.zeros((1, 2), np.int64) if pl.repetition is None else orr.rep_offsets(pl.repetition, lo, hi)
    out = np.empty((offs.shape[0], 6), np.float64)
    out[:, :4] = pl.linear
    out[:, 4] = offs[:, 0] + pl.x
    out[:, 5] = offs[:, 1] + pl.y
    return out


def instances(sv: Survey, name: str, tops: list, parents: dict, block: int = INSTANCE_BLOCK):
    """Affine blocks (m, 6) of every placement of ``name`` in the flattened result, in the order of
    :func:`metalay.io.gdsread._placements` (by parent cell, then placement record, parent placement, position)."""
    from metalay.io.gdsread import _compose

    if name in tops:
        yield _IDENT
    for parent in parents.get(name, ()):
        for pl in _placements_of(sv, parent, name):
            k = pl.count
            if k <= block:
                r = _affine_slice(pl, 0, k)
                step = max(1, block // k)
                for pa in instances(sv, parent, tops, parents, block):
                    for lo in range(0, pa.shape[0], step):
                        yield _compose(pa[lo:lo + step], r)
                continue
            for pa in instances(sv, parent, tops, parents, block):  # one parent placement at a time
                for i in range(pa.shape[0]):
                    for lo in range(0, k, block):
                        yield _compose(pa[i:i + 1], _affine_slice(pl, lo, min(k, lo + block)))


# ----------------------------------------------------------------------------------------------------------------
# Geometry at its placements
# ----------------------------------------------------------------------------------------------------------------

def _place(piece, a: np.ndarray):
    """A piece at the placements ``a`` (m, 6), placement-major: the arithmetic of
    :func:`metalay.io.gdsread._put_placed` (integer translations exactly, other maps rounded half-to-even)."""
    lay, dt, cnt, pts = piece
    m = a.shape[0]
    if m == 1 and np.array_equal(a[0], _IDENT[0]):
        return piece
    if np.all(a[:, :4] == [1.0, 0.0, 0.0, 1.0]) and np.all(a[:, 4:] == np.rint(a[:, 4:])):
        placed = pts[None, :, :] + a[:, None, 4:].astype(np.int64)
    else:
        x, y = pts[None, :, 0].astype(np.float64), pts[None, :, 1].astype(np.float64)
        placed = np.rint(np.stack([a[:, 0:1] * x + a[:, 1:2] * y + a[:, 4:5],
                                   a[:, 2:3] * x + a[:, 3:4] * y + a[:, 5:6]], axis=-1)).astype(np.int64)
    return np.tile(lay, m), np.tile(dt, m), np.tile(cnt, m), placed.reshape(-1, 2)


def _held(sv: Survey, name: str):
    """A cell's own geometry expanded once, as one piece."""
    parts = list(walk_cell(sv, name, "geometry"))
    if not parts:
        return None
    return tuple(np.concatenate([q[j] for q in parts]) for j in range(4))


def cell_pieces(sv: Survey, name: str, tops: list, parents: dict, n_instances: int, chunk_polygons: int):
    """Pieces of one cell at all its placements, in the order of the whole read (placement-major)."""
    own_p, own_v = sv.cells[name].own
    if n_instances == 1 or own_v > HOLD_VERTICES:  # parsed again for every placement
        for a in instances(sv, name, tops, parents):
            for i in range(a.shape[0]):
                for piece in walk_cell(sv, name, "geometry"):
                    yield _place(piece, a[i:i + 1])
        return
    held = _held(sv, name)
    if held is None:
        return
    step = max(1, chunk_polygons // max(1, own_p))
    for a in instances(sv, name, tops, parents):
        for lo in range(0, a.shape[0], step):
            yield _place(held, a[lo:lo + step])


def rechunk(pieces, chunk_polygons: int):
    """Regroup pieces into consecutive chunks of at most ``chunk_polygons`` polygons (small pieces joined)."""
    acc, n_acc = [], 0
    for lay, dt, cnt, xy in pieces:
        vstart = np.zeros(cnt.shape[0] + 1, np.int64)
        np.cumsum(cnt, out=vstart[1:])
        lo = 0
        while lo < cnt.shape[0]:
            hi = min(cnt.shape[0], lo + chunk_polygons - n_acc)
            acc.append((lay[lo:hi], dt[lo:hi], cnt[lo:hi], xy[vstart[lo]:vstart[hi]]))
            n_acc += hi - lo
            lo = hi
            if n_acc == chunk_polygons:
                yield _join(acc)
                acc, n_acc = [], 0
    if n_acc:
        yield _join(acc)


def _join(acc):
    if len(acc) == 1:
        return acc[0]
    return tuple(np.concatenate([q[j] for q in acc]) for j in range(4))


def iter_pieces(sv: Survey, tops: list, order: list, sizes: dict, inst: dict, chunk_polygons: int):
    """Every polygon of the flattened tops, cell by cell in ``order`` (parents first), in chunks."""
    parents: dict = {}
    for name in order:  # parents first: the order in which the whole read appends placements
        if name in inst:
            for child in dict.fromkeys(r.child for r in sv.cells[name].refs):
                if sizes[child][0]:
                    parents.setdefault(child, []).append(name)

    def pieces():
        for name in order:
            if name in inst and sv.cells[name].own[0]:
                yield from cell_pieces(sv, name, tops, parents, inst[name], chunk_polygons)

    yield from rechunk(pieces(), chunk_polygons)
