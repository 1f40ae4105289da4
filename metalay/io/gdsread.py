"""Read GDSII and OASIS masks into flat arrays of integer polygons.

The GDSII path is a record walk that recognises runs of identically structured elements and decodes each run
with numpy views (a run of ten million 4-vertex BOUNDARY elements is one strided view of the file); only the
first element of a run is walked record by record in Python.  References (SREF/AREF) are resolved with numpy
affine transforms after a cycle check and a count of the flattened size, so a hostile file is rejected before
any large array is allocated.  OASIS files are read by :mod:`metalay.io.oasis_read` (pure Python + numpy, counts
checked before expansion).

Every failure on malformed input is a :class:`metalay.errors.MaskReadError` naming the file, the byte offset
and what was expected.
"""

from __future__ import annotations

import hashlib
import math
import mmap
import os
import struct
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path

import numpy as np

from metalay.errors import GeometryError, MaskReadError
from metalay.util.budget import format_bytes, memory_budget

__all__ = [
    "FlatPolygons",
    "read_mask",
    "mask_format",
    "mask_info",
    "file_sha256",
    "DEFAULT_MAX_ELEMENTS",
    "DEFAULT_MAX_VERTICES",
    "DEFAULT_MAX_DEPTH",
    "flatten_bytes",
]

DEFAULT_MAX_ELEMENTS = 100_000_000
"""Default limit on flattened polygons (and on reference instances) per read."""
DEFAULT_MAX_VERTICES = 400_000_000
"""Default limit on flattened vertices (6.4 GB of int64 coordinates)."""
DEFAULT_MAX_DEPTH = 64
"""Default limit on reference nesting depth."""

# Record types, GDSII Stream Format Manual Release 6.0 (Calma 1987), chapter "Record Description".
_HEADER, _BGNLIB, _LIBNAME, _UNITS, _ENDLIB = 0x00, 0x01, 0x02, 0x03, 0x04
_BGNSTR, _STRNAME, _ENDSTR = 0x05, 0x06, 0x07
_BOUNDARY, _PATH, _SREF, _AREF, _TEXT = 0x08, 0x09, 0x0A, 0x0B, 0x0C
_LAYER, _DATATYPE, _WIDTH, _XY, _ENDEL, _SNAME, _COLROW = 0x0D, 0x0E, 0x0F, 0x10, 0x11, 0x12, 0x13
_NODE, _STRANS, _MAG, _ANGLE, _PATHTYPE = 0x15, 0x1A, 0x1B, 0x1C, 0x21
_BOX, _BOXTYPE, _BGNEXTN, _ENDEXTN = 0x2D, 0x2E, 0x30, 0x31
_ELEMENT_STARTS = {_BOUNDARY, _PATH, _SREF, _AREF, _TEXT, _NODE, _BOX}
_MAX_RECORD_TYPE = 0x3B
# Expected data type per record (0 none, 1 bit array, 2 int16, 3 int32, 5 real8, 6 ASCII).
_DTYPE = {_HEADER: 2, _BGNLIB: 2, _UNITS: 5, _BGNSTR: 2, _STRNAME: 6, _LAYER: 2, _DATATYPE: 2, _WIDTH: 3, _XY: 3,
          _SNAME: 6, _COLROW: 2, _STRANS: 1, _MAG: 5, _ANGLE: 5, _PATHTYPE: 2, _BOXTYPE: 2, _BGNEXTN: 3,
          _ENDEXTN: 3, _ENDEL: 0, _ENDSTR: 0, _ENDLIB: 0}
_RUN_CHUNK_MAX = 1 << 16
_WALK_RUN_MAX = 1 << 20  # elements per recorded BOUNDARY run (a longer run is kept as consecutive sub-runs)
_DECODE_CHUNK = 1 << 19


@dataclass(frozen=True)
class FlatPolygons:
    """Flattened polygons of a mask, in database units.

    Attributes
    ----------
    layer, datatype : np.ndarray, shape (P,), int32
        GDSII layer and datatype of each polygon.
    start : np.ndarray, shape (P+1,), int64
        Polygon ``k`` has vertices ``xy_db[start[k]:start[k+1]]``; the closing vertex is not repeated.
    xy_db : np.ndarray, shape (N, 2), int64
        Vertex coordinates in database units.
    db_unit_nm : float
        Size of the database unit in nanometres (1.0 for a 1 nm grid); converted once from the file's metres when
        the file is read.
    user_unit_m : float
        Size of the user unit in metres (1e-6 for micrometres).
    """

    layer: np.ndarray
    datatype: np.ndarray
    start: np.ndarray
    xy_db: np.ndarray
    db_unit_nm: float
    user_unit_m: float

    @property
    def count(self) -> int:
        """Number of polygons P."""
        return int(self.layer.shape[0])

    @property
    def vertex_counts(self) -> np.ndarray:
        """Vertices per polygon, shape (P,), int64."""
        return np.diff(self.start)

    def select(self, mask: np.ndarray) -> "FlatPolygons":
        """Return the polygons where the boolean ``mask`` (shape (P,)) is true, in the same order."""
        mask = np.asarray(mask, dtype=bool)
        counts = np.diff(self.start)
        vmask = np.repeat(mask, counts)
        start = np.zeros(int(mask.sum()) + 1, dtype=np.int64)
        np.cumsum(counts[mask], out=start[1:])
        return FlatPolygons(self.layer[mask], self.datatype[mask], start, self.xy_db[vmask], self.db_unit_nm,
                            self.user_unit_m)

    @staticmethod
    def from_arrays(layer, datatype, counts, xy_db, *, db_unit_nm: float = 1.0,
                    user_unit_m: float = 1e-6) -> "FlatPolygons":
        """Build from per-polygon vertex ``counts`` (shape (P,)) and concatenated ``xy_db`` (shape (N, 2))."""
        counts = np.asarray(counts, dtype=np.int64)
        start = np.zeros(counts.shape[0] + 1, dtype=np.int64)
        np.cumsum(counts, out=start[1:])
        xy = np.asarray(xy_db, dtype=np.int64).reshape(-1, 2)
        if start[-1] != xy.shape[0]:
            raise GeometryError(f"vertex counts sum to {start[-1]} but xy_db has {xy.shape[0]} rows")
        return FlatPolygons(np.broadcast_to(np.asarray(layer, np.int32), counts.shape).copy(),
                            np.broadcast_to(np.asarray(datatype, np.int32), counts.shape).copy(),
                            start, xy, float(db_unit_nm), float(user_unit_m))


# ----------------------------------------------------------------------------------------------------------------
# Internal library model shared by the GDSII and OASIS front ends
# ----------------------------------------------------------------------------------------------------------------

@dataclass
class _Run:
    """A run of k identically structured BOUNDARY elements starting at byte ``pos`` with stride ``size``."""

    pos: int
    size: int
    k: int
    xy_off: int          # offset of XY data (after the record header) inside one element
    n_xy: int            # points per element in the XY record
    layer: np.ndarray    # (k,) int32
    datatype: np.ndarray  # (k,) int32
    closed: np.ndarray   # (k,) bool: last point equals first point
    keep: np.ndarray     # (k,) bool: passes the layer filter

    @property
    def n_polys(self) -> int:
        return int(self.keep.sum())

    @property
    def n_verts(self) -> int:
        return int((self.keep * (self.n_xy - self.closed)).sum())


@dataclass
class _Explicit:
    """Polygons already decoded (paths, boxes, OASIS polygons)."""

    layer: np.ndarray
    datatype: np.ndarray
    counts: np.ndarray
    xy: np.ndarray  # (N, 2) int64


@dataclass
class _RefGroup:
    """Placements of one child cell, counted but not expanded.

    ``count`` (an exact int) placements; ``expand()`` builds their affine maps x -> A x + t, A = [[a, b], [c, d]]
    as an array of shape (count, 6) float64, and is called only after the whole hierarchy has been counted and
    found within the limits and the memory budget (an AREF of 32767 x 32767 is 1e9 placements in 60 bytes).
    """

    child: str
    count: int
    expand: Callable[[], np.ndarray]
    offset: int  # byte offset for messages

    def affine(self) -> np.ndarray:
        """The placements' affine maps, shape (count, 6) float64."""
        return self.expand()


@dataclass
class _Cell:
    name: str
    runs: list = field(default_factory=list)
    explicit: list = field(default_factory=list)
    refs: list = field(default_factory=list)
    n_elements: dict = field(default_factory=dict)

    def own_counts(self) -> tuple[int, int]:
        p = sum(r.n_polys for r in self.runs) + sum(int(e.counts.shape[0]) for e in self.explicit)
        v = sum(r.n_verts for r in self.runs) + sum(int(e.counts.sum()) for e in self.explicit)
        return p, v

    def own_layer_counts(self) -> dict:
        out: dict = {}
        for src in list(self.runs) + list(self.explicit):
            lay, dt = (src.layer[src.keep], src.datatype[src.keep]) if isinstance(src, _Run) else (src.layer,
                                                                                                    src.datatype)
            if lay.size == 0:
                continue
            key = lay.astype(np.int64) * 65536 + dt.astype(np.int64)
            u, c = np.unique(key, return_counts=True)
            for kk, cc in zip(u.tolist(), c.tolist()):
                pair = (kk // 65536, kk % 65536)
                out[pair] = out.get(pair, 0) + cc
        return out


@dataclass
class _Library:
    path: str
    fmt: str
    db_unit_m: float
    user_unit_m: float
    cells: dict  # name -> _Cell, in file order
    buf: object = None  # numpy view of the GDSII bytes (runs decode from it)


def _err(path, msg) -> MaskReadError:
    return MaskReadError(f"{path}: {msg}")


# ----------------------------------------------------------------------------------------------------------------
# GDSII numeric formats
# ----------------------------------------------------------------------------------------------------------------

def _real8(raw: np.ndarray) -> np.ndarray:
    """Decode GDSII 8-byte reals (excess-64, base-16; sign bit, 7-bit exponent, 56-bit mantissa).

    ``raw`` has shape (..., 8) uint8.  Value = (-1)^s * (mantissa / 2^56) * 16^(exponent - 64).
    Source: Calma GDSII Stream Format Manual, Release 6.0 (1987), "Data Types: 8-byte real".
    """
    raw = np.ascontiguousarray(raw, dtype=np.uint8)
    word = raw.view(">u8")[..., 0].astype(np.uint64)
    sign = np.where((word >> np.uint64(63)) != 0, -1.0, 1.0)
    expo = ((word >> np.uint64(56)) & np.uint64(0x7F)).astype(np.int64) - 64
    mant = (word & np.uint64(0x00FFFFFFFFFFFFFF)).astype(np.float64) / float(1 << 56)
    return sign * mant * np.power(16.0, expo.astype(np.float64))


def _int16(raw: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(raw, dtype=np.uint8).view(">i2").astype(np.int32)


def _uniform(a: np.ndarray) -> np.ndarray:
    """``a`` itself, or a read-only view of its one value when every entry is the same (a run on one layer, every
    polygon closed: the per-element table of a long run then costs nothing)."""
    if a.size > 1 and bool((a == a[0]).all()):
        return np.broadcast_to(a[:1].copy()[0], a.shape)
    return a


def _field(buf: np.ndarray, start: int, k: int, size: int, off: int, dtype, shape: tuple = ()) -> np.ndarray:
    """A view (k, *shape) of the field at byte ``off`` of each of ``k`` consecutive ``size``-byte elements of
    ``buf`` from byte ``start`` (no copy; numpy refuses a view that would run past the buffer)."""
    dt = np.dtype(dtype)
    inner = tuple(int(dt.itemsize * math.prod(shape[i + 1:])) for i in range(len(shape)))
    return np.ndarray((k, *shape), dt, buffer=buf, offset=start + off, strides=(size, *inner))


def _ascii(raw: bytes) -> str:
    return raw.rstrip(b"\0").decode("ascii", errors="replace")


# ----------------------------------------------------------------------------------------------------------------
# GDSII record walk
# ----------------------------------------------------------------------------------------------------------------

class _Records:
    """Validated access to the records of a memory-mapped GDSII file: headers, element templates, element runs."""

    def __init__(self, path: str, mm, buf: np.ndarray, release=None):
        self.path = path
        self.mm = mm
        self.buf = buf
        self.n = buf.shape[0]
        self.release = release  # callable (mm, start, stop): drop walked pages from the resident set (streaming)

    def header(self, pos: int) -> tuple[int, int, int]:
        """(length, record type, data type) of the record at ``pos``, checked against the file and the manual."""
        if pos + 4 > self.n:
            raise _err(self.path, f"truncated file: record header expected at byte {pos}, file has {self.n} bytes")
        length, rtype, dtype = struct.unpack_from(">HBB", self.mm, pos)
        if length < 4 or length % 2:
            raise _err(self.path, f"bad record length {length} at byte {pos} (allowed: even, >= 4)")
        if pos + length > self.n:
            raise _err(self.path, f"truncated file: record of {length} bytes at byte {pos} runs past the end "
                                  f"({self.n} bytes)")
        if rtype > _MAX_RECORD_TYPE:
            raise _err(self.path, f"unknown record type 0x{rtype:02X} at byte {pos} (allowed: 0x00..0x3B)")
        want = _DTYPE.get(rtype)
        if want is not None and dtype != want:
            raise _err(self.path, f"record 0x{rtype:02X} at byte {pos} has data type {dtype}, expected {want}")
        return length, rtype, dtype

    def element_template(self, pos: int) -> tuple[int, list]:
        """Walk one element from ``pos`` to its ENDEL; return (size, [(rel_off, length, rtype)])."""
        recs = []
        p = pos
        while True:
            length, rtype, _ = self.header(p)
            if p != pos and (rtype in _ELEMENT_STARTS or rtype in (_ENDSTR, _ENDLIB, _BGNSTR)):
                raise _err(self.path, f"element at byte {pos} not closed by ENDEL before byte {p}")
            recs.append((p - pos, length, rtype))
            p += length
            if rtype == _ENDEL:
                return p - pos, recs

    def run_length(self, pos: int, size: int, recs: list) -> int:
        """How many elements from ``pos`` repeat the template's record headers (found in doubling chunks)."""
        expect = [(off, _field(self.buf, pos, 1, size, off, np.uint32)[0]) for off, _, _ in recs]
        k = 1
        chunk = 16
        while True:
            m = min(chunk, (self.n - (pos + k * size)) // size)
            if m <= 0:
                return k
            s0 = pos + k * size
            ok = np.ones(m, bool)
            for off, word in expect:  # each record header as one 4-byte word, compared in place
                ok &= _field(self.buf, s0, m, size, off, np.uint32) == word
            if self.release is not None:
                self.release(self.mm, s0, s0 + m * size)
            if not ok.all():
                return k + int(np.argmin(ok))
            k += m
            chunk = min(chunk * 2, _RUN_CHUNK_MAX)

    def need(self, pos, byt, rtype, name, nbytes=None):
        """(offset, length) of record ``rtype`` inside the element at ``pos`` (required, optionally sized)."""
        if rtype not in byt:
            raise _err(self.path, f"element at byte {pos} lacks its {name} record")
        off, ln = byt[rtype]
        if nbytes is not None and ln != nbytes:
            raise _err(self.path, f"{name} record in element at byte {pos} has {ln} data bytes, expected {nbytes}")
        return off, ln


@dataclass
class _WalkState:
    """What the walk carries from record to record."""

    layer_filter: object
    max_elements: int
    db_unit_m: float | None = None
    user_unit_m: float | None = None


def _walk_gdsii(rd: _Records, layer_filter, max_elements: int) -> _Library:
    """Stage 1 of reading GDSII: walk the records into cells of element runs, explicit polygons and references."""
    length, rtype, _ = rd.header(0)
    if rtype != _HEADER:
        raise _err(rd.path, "not a GDSII stream file (first record is not HEADER)")
    pos = length
    state = _WalkState(layer_filter, max_elements)
    cells: dict[str, _Cell] = {}
    cell: _Cell | None = None
    while True:
        length, rtype, _ = rd.header(pos)
        if rtype == _ENDLIB:
            break
        if rtype == _UNITS:
            state.db_unit_m, state.user_unit_m = _units_record(rd, pos, length)
            pos += length
        elif rtype == _BGNSTR:
            if cell is not None:
                raise _err(rd.path, f"BGNSTR at byte {pos} inside structure {cell.name!r}")
            cell, pos = _begin_structure(rd, pos + length, cells, state)
        elif rtype == _ENDSTR:
            if cell is None:
                raise _err(rd.path, f"ENDSTR at byte {pos} outside a structure")
            cell = None
            pos += length
        elif rtype in _ELEMENT_STARTS:
            if cell is None:
                raise _err(rd.path, f"element record 0x{rtype:02X} at byte {pos} outside a structure")
            pos = _element_run(rd, pos, cell, state)
        else:
            pos += length
    if cell is not None:
        raise _err(rd.path, f"ENDLIB reached inside structure {cell.name!r} (missing ENDSTR)")
    if state.db_unit_m is None:
        raise _err(rd.path, "no UNITS record")
    return _Library(rd.path, "GDSII", state.db_unit_m, state.user_unit_m, cells, rd.buf)


def _units_record(rd: _Records, pos: int, length: int) -> tuple[float, float]:
    """(database unit, user unit) in metres from the UNITS record at ``pos``."""
    if length != 20:
        raise _err(rd.path, f"UNITS record at byte {pos} has length {length}, expected 20")
    vals = _real8(rd.buf[pos + 4:pos + 20].reshape(2, 8))
    db_in_user, db_m = float(vals[0]), float(vals[1])
    if not (math.isfinite(db_in_user) and math.isfinite(db_m) and db_in_user > 0 and 0 < db_m < 1):
        raise _err(rd.path, f"UNITS at byte {pos} invalid: database unit {db_m} m, "
                            f"{db_in_user} user units (allowed: positive, database unit < 1 m)")
    return db_m, db_m / db_in_user


def _begin_structure(rd: _Records, pos: int, cells: dict, state: _WalkState) -> tuple[_Cell, int]:
    """The STRNAME record after a BGNSTR: a new, uniquely named cell; returns it and the next position."""
    length, rtype, _ = rd.header(pos)
    if rtype != _STRNAME:
        raise _err(rd.path, f"expected STRNAME at byte {pos} after BGNSTR")
    name = _ascii(bytes(rd.mm[pos + 4:pos + length]))
    if name in cells:
        raise _err(rd.path, f"structure name {name!r} defined twice (second at byte {pos})")
    if state.db_unit_m is None:
        raise _err(rd.path, f"structure {name!r} at byte {pos} comes before the UNITS record")
    cell = cells[name] = _Cell(name)
    return cell, pos + length


def _element_run(rd: _Records, pos: int, cell: _Cell, state: _WalkState) -> int:
    """Stage 2: the run of identically structured elements at ``pos``, decoded as one strided block."""
    size, recs = rd.element_template(pos)
    k = rd.run_length(pos, size, recs)
    kind = recs[0][2]
    byt = {}
    for off, length, rtype in recs:
        byt.setdefault(rtype, (off + 4, length - 4))
    cell.n_elements[kind] = cell.n_elements.get(kind, 0) + k
    step = _WALK_RUN_MAX if kind in (_BOUNDARY, _BOX) else k  # long BOUNDARY runs as sub-runs: bounded temporaries
    for lo in range(0, k, step):
        hi = min(k, lo + step)
        block = rd.buf[pos + lo * size:pos + hi * size].reshape(hi - lo, size)
        if kind in (_BOUNDARY, _BOX):
            _decode_boundary(rd, pos + lo * size, block, byt, kind, cell, state.layer_filter)
        elif kind == _PATH:
            _decode_path(rd, pos, block, byt, cell, state.layer_filter)
        elif kind in (_SREF, _AREF):
            _decode_ref(rd, pos, block, byt, kind, cell, state)
        if rd.release is not None:
            rd.release(rd.mm, pos + lo * size, pos + hi * size)
    return pos + k * size


def _decode_boundary(rd: _Records, pos, block, byt, kind, cell: _Cell, layer_filter) -> None:
    """BOUNDARY runs stay views of the file (decoded when flattened); BOX elements become explicit polygons."""
    lo, _ = rd.need(pos, byt, _LAYER, "LAYER", 2)
    tname, trec = ("DATATYPE", _DATATYPE) if kind == _BOUNDARY else ("BOXTYPE", _BOXTYPE)
    do, _ = rd.need(pos, byt, trec, tname, 2)
    xo, xl = rd.need(pos, byt, _XY, "XY")
    if xl % 8 or xl < 8 * 3:
        raise _err(rd.path, f"XY record in element at byte {pos} has {xl} data bytes "
                            f"(allowed: a multiple of 8, at least 3 points)")
    n_xy = xl // 8
    k, size = block.shape
    layer = _field(rd.buf, pos, k, size, lo, ">i2").astype(np.int32)
    datatype = _field(rd.buf, pos, k, size, do, ">i2").astype(np.int32)
    closed = _field(rd.buf, pos, k, size, xo, np.uint64) == _field(rd.buf, pos, k, size, xo + xl - 8, np.uint64)
    keep = layer_filter(layer, datatype)
    if kind == _BOX:
        xy = np.ascontiguousarray(block[:, xo:xo + xl]).view(">i4").astype(np.int64).reshape(-1, n_xy, 2)
        vmask = np.ones(xy.shape[:2], bool)
        vmask[closed, -1] = False
        vmask &= keep[:, None]
        counts = vmask.sum(axis=1)[keep]
        cell.explicit.append(_Explicit(layer[keep], datatype[keep], counts, xy[vmask]))
        return
    if not keep.any():  # nothing wanted from this run (another layer): no per-element table is kept for it
        return
    cell.runs.append(_Run(pos, block.shape[1], block.shape[0], xo, n_xy, _uniform(layer), _uniform(datatype),
                          _uniform(closed), _uniform(keep)))


def _decode_path(rd: _Records, pos, block, byt, cell: _Cell, layer_filter) -> None:
    """PATH elements outlined as polygons (width, path type and extensions per element)."""
    lo, _ = rd.need(pos, byt, _LAYER, "LAYER", 2)
    do, _ = rd.need(pos, byt, _DATATYPE, "DATATYPE", 2)
    xo, xl = rd.need(pos, byt, _XY, "XY")
    if xl % 8 or xl < 16:
        raise _err(rd.path, f"XY record of PATH at byte {pos} has {xl} data bytes (allowed: >= 2 points)")
    k = block.shape[0]
    layer = _int16(block[:, lo:lo + 2])[:, 0]
    datatype = _int16(block[:, do:do + 2])[:, 0]
    keep = layer_filter(layer, datatype)
    if not keep.any():
        return
    width = np.zeros(k)
    if _WIDTH in byt:
        wo, _ = rd.need(pos, byt, _WIDTH, "WIDTH", 4)
        width = np.abs(np.ascontiguousarray(block[:, wo:wo + 4]).view(">i4")[:, 0].astype(np.float64))
    ptype = np.zeros(k, np.int32)
    if _PATHTYPE in byt:
        po, _ = rd.need(pos, byt, _PATHTYPE, "PATHTYPE", 2)
        ptype = _int16(block[:, po:po + 2])[:, 0]
    ext = {}
    for rt, nm in ((_BGNEXTN, "BGNEXTN"), (_ENDEXTN, "ENDEXTN")):
        ext[rt] = np.zeros(k)
        if rt in byt:
            eo, _ = rd.need(pos, byt, rt, nm, 4)
            ext[rt] = np.ascontiguousarray(block[:, eo:eo + 4]).view(">i4")[:, 0].astype(np.float64)
    xy = np.ascontiguousarray(block[:, xo:xo + xl]).view(">i4").astype(np.float64).reshape(k, -1, 2)
    cell.explicit.append(_paths_to_polygons(xy[keep], width[keep], ptype[keep], ext[_BGNEXTN][keep],
                                            ext[_ENDEXTN][keep], layer[keep], datatype[keep]))


def _ref_linear(rd: _Records, pos, block, byt) -> np.ndarray:
    """Linear part ``R(angle) diag(mag, mag * fy)`` of each reference, shape (k, 4), from STRANS, MAG, ANGLE."""
    k = block.shape[0]
    refl = np.zeros(k, bool)
    if _STRANS in byt:
        to, _ = rd.need(pos, byt, _STRANS, "STRANS", 2)
        refl = (block[:, to] & 0x80) != 0
    mag = np.ones(k)
    if _MAG in byt:
        mo, _ = rd.need(pos, byt, _MAG, "MAG", 8)
        mag = _real8(block[:, mo:mo + 8])
    ang = np.zeros(k)
    if _ANGLE in byt:
        ao, _ = rd.need(pos, byt, _ANGLE, "ANGLE", 8)
        ang = _real8(block[:, ao:ao + 8])
    if not (np.isfinite(mag).all() and np.isfinite(ang).all() and (mag > 0).all() and (mag < 1e6).all()):
        raise _err(rd.path, f"reference at byte {pos}: MAG/ANGLE not finite or MAG outside (0, 1e6)")
    c, s = np.cos(np.radians(ang)), np.sin(np.radians(ang))
    # exact zeros/ones at multiples of 90 degrees keep integer placements exact
    c = np.where(np.abs(c) < 1e-15, 0.0, c)
    s = np.where(np.abs(s) < 1e-15, 0.0, s)
    fy = np.where(refl, -1.0, 1.0)
    return np.stack([c * mag, -s * mag * fy, s * mag, c * mag * fy], axis=1)


def _aref_counts(rd: _Records, pos, block, byt) -> tuple[np.ndarray, np.ndarray]:
    """Columns and rows of each AREF of a run (int64, each >= 1); nothing is expanded here."""
    co, _ = rd.need(pos, byt, _COLROW, "COLROW", 4)
    colrow = _int16(block[:, co:co + 4])
    cols, rows = colrow[:, 0].astype(np.int64), colrow[:, 1].astype(np.int64)
    if (cols < 1).any() or (rows < 1).any():
        raise _err(rd.path, f"AREF at byte {pos}: COLROW must be >= 1 (got {cols.min()}, {rows.min()})")
    return cols, rows


def _expand_refs(lin: np.ndarray, xy: np.ndarray, cols: np.ndarray | None, rows: np.ndarray | None) -> np.ndarray:
    """Affine maps (m, 6) of SREFs (``cols`` None: one per element at XY) or of every element of AREFs.

    AREF element (i, j) sits at origin + i * (P2 - origin) / cols + j * (P3 - origin) / rows (Calma GDSII Stream
    Format Manual, Release 6.0, AREF: XY holds the origin and the displaced column and row corners).
    """
    if cols is None:
        return np.concatenate([lin, xy[:, 0, :]], axis=1)
    tot = cols * rows
    eidx = np.repeat(np.arange(cols.shape[0]), tot)
    local = np.arange(int(tot.sum())) - np.repeat(np.cumsum(tot) - tot, tot)
    ci = local % cols[eidx]
    ri = local // cols[eidx]
    o, pc, pr = xy[eidx, 0], xy[eidx, 1], xy[eidx, 2]
    t = (o + (pc - o) * (ci / cols[eidx])[:, None] + (pr - o) * (ri / rows[eidx])[:, None])
    return np.concatenate([lin[eidx], t], axis=1)


def _decode_ref(rd: _Records, pos, block, byt, kind, cell: _Cell, state: _WalkState) -> None:
    """SREF/AREF runs: placements grouped by the referenced cell's name, counted, kept unexpanded."""
    so, sl = rd.need(pos, byt, _SNAME, "SNAME")
    xo, xl = rd.need(pos, byt, _XY, "XY", 8 if kind == _SREF else 24)
    k = block.shape[0]
    lin = _ref_linear(rd, pos, block, byt)
    xy = np.ascontiguousarray(block[:, xo:xo + xl]).view(">i4").astype(np.float64).reshape(k, -1, 2)
    cols = rows = None
    rep = np.ones(k, np.int64)
    if kind == _AREF:
        cols, rows = _aref_counts(rd, pos, block, byt)
        rep = cols * rows
    names_raw = np.ascontiguousarray(block[:, so:so + sl])
    if k == 1:
        groups = [(bytes(names_raw[0]), np.ones(1, bool))]
    else:
        u, inv = np.unique(names_raw.view(f"V{sl}")[:, 0], return_inverse=True)
        groups = [(bytes(u[g]), inv.ravel() == g) for g in range(u.shape[0])]
    for nm, sel in groups:
        expand = partial(_expand_refs, lin[sel], xy[sel], None if cols is None else cols[sel],
                         None if rows is None else rows[sel])
        cell.refs.append(_RefGroup(_ascii(nm), int(rep[sel].sum()), expand, pos))


def _paths_to_polygons(xy, width, ptype, bext, eext, layer, datatype) -> _Explicit:
    """Outline GDSII paths: square-cornered (mitred) joins; pathtype 0 flush, 1 round, 2 half-width, 4 custom ends."""
    import shapely

    k, n = xy.shape[:2]
    ok = width > 0
    d0 = xy[:, 1] - xy[:, 0]
    d1 = xy[:, -1] - xy[:, -2]
    n0 = d0 / np.maximum(np.hypot(d0[:, 0], d0[:, 1]), 1e-300)[:, None]
    n1 = d1 / np.maximum(np.hypot(d1[:, 0], d1[:, 1]), 1e-300)[:, None]
    e0 = np.where(ptype == 2, width / 2, np.where(ptype == 4, bext, 0.0))
    e1 = np.where(ptype == 2, width / 2, np.where(ptype == 4, eext, 0.0))
    xy = xy.copy()
    xy[:, 0] -= n0 * e0[:, None]
    xy[:, -1] += n1 * e1[:, None]
    polys_out = []
    for cap in ("flat", "round"):
        sel = ok & ((ptype == 1) if cap == "round" else (ptype != 1))
        if not sel.any():
            continue
        lines = shapely.linestrings(xy[sel].reshape(-1, 2), indices=np.repeat(np.arange(int(sel.sum())), n))
        polys = shapely.buffer(lines, width[sel] / 2, cap_style=cap, join_style="mitre", mitre_limit=10.0)
        polys_out.append((polys, layer[sel], datatype[sel]))
    if not polys_out:
        z = np.zeros(0, np.int32)
        return _Explicit(z, z, np.zeros(0, np.int64), np.zeros((0, 2), np.int64))
    polys = np.concatenate([p for p, _, _ in polys_out])
    lay = np.concatenate([q for _, q, _ in polys_out])
    dt = np.concatenate([q for _, _, q in polys_out])
    return _from_shapely(polys, lay, dt)


def _from_shapely(polys, layer, datatype) -> _Explicit:
    import shapely

    parts, idx = shapely.get_parts(polys, return_index=True)
    parts = shapely.orient_polygons(parts) if hasattr(shapely, "orient_polygons") else parts
    ring = shapely.get_exterior_ring(parts)
    coords, ridx = shapely.get_coordinates(ring, return_index=True)
    counts = np.bincount(ridx, minlength=parts.shape[0]).astype(np.int64)
    last = np.cumsum(counts) - 1
    vmask = np.ones(coords.shape[0], bool)
    vmask[last[counts > 0]] = False
    return _Explicit(np.asarray(layer)[idx].astype(np.int32), np.asarray(datatype)[idx].astype(np.int32),
                     np.maximum(counts - 1, 0), np.rint(coords[vmask]).astype(np.int64))


# ----------------------------------------------------------------------------------------------------------------
# OASIS through metalay's own reader (metalay.io.oasis_read)
# ----------------------------------------------------------------------------------------------------------------

def _read_oasis(path: str, layer_filter, max_elements: int = DEFAULT_MAX_ELEMENTS,
                max_vertices: int = DEFAULT_MAX_VERTICES, max_memory_bytes: int | None = None) -> _Library:
    """Read an OASIS file with :mod:`metalay.io.oasis_read` (pure Python + numpy: a hostile file raises, it
    cannot crash the process) into the shared library model.

    The reader counts every repetition and admits each cell's own geometry against the limits and the memory
    budget while parsing; placements stay unexpanded (:class:`_RefGroup`) until :func:`_flatten` has counted the
    fan-out through the whole hierarchy.
    """
    from metalay.io import oasis_read

    layout = oasis_read.parse_oasis(path, layer_filter=layer_filter, max_elements=max_elements,
                                    max_vertices=max_vertices, max_memory_bytes=max_memory_bytes)
    cells: dict[str, _Cell] = {}
    for c in layout.cells.values():
        cell = _Cell(c.name)
        cells[c.name] = cell
        for lay, dt, cnt, xy in c.chunks:  # the chunks the reader expanded, without joining them
            cell.explicit.append(_Explicit(lay.astype(np.int32, copy=False), dt.astype(np.int32, copy=False),
                                           cnt.astype(np.int64, copy=False), xy))
        geometry = sum(v for k, v in c.records.items() if k in ("rectangle", "polygon", "trapezoid",
                                                                  "ctrapezoid", "circle"))
        for code, n in ((_BOUNDARY, geometry), (_PATH, c.records.get("path", 0)),
                        (_SREF, c.records.get("placement", 0)), (_TEXT, c.records.get("text", 0))):
            if n:
                cell.n_elements[code] = n
        for p in c.placements:
            cell.refs.append(_RefGroup(p.child, int(p.count), p.affine, p.offset))
    return _Library(path, "OASIS", layout.db_unit_m, layout.user_unit_m, cells)


# ----------------------------------------------------------------------------------------------------------------
# Hierarchy: checks, counts, flattening
# ----------------------------------------------------------------------------------------------------------------

def _topology(lib: _Library, cell: str | None, max_depth: int):
    """Return (tops, order): top cells and all reachable cells in parent-before-child order.

    Raises MaskReadError on undefined references, cycles, or nesting deeper than ``max_depth``.
    """
    cells = lib.cells
    for c in cells.values():
        for r in c.refs:
            if r.child not in cells:
                raise _err(lib.path, f"structure {c.name!r} references undefined structure {r.child!r}")
    if cell is not None:
        if cell not in cells:
            raise _err(lib.path, f"no structure named {cell!r} (available: {', '.join(sorted(cells)[:20])})")
        tops = [cell]
    else:
        referenced = {r.child for c in cells.values() for r in c.refs}
        tops = [n for n in cells if n not in referenced]
        if not tops and cells:
            raise _err(lib.path, "every structure is referenced by another: reference cycle")
    # iterative DFS: colour 1 = on stack, 2 = done; post-order gives children first
    colour: dict[str, int] = {}
    post: list[str] = []
    for top in tops:
        if colour.get(top) == 2:
            continue
        stack = [(top, 0, iter(sorted({r.child for r in cells[top].refs})))]
        colour[top] = 1
        while stack:
            name, depth, it = stack[-1]
            child = next(it, None)
            if child is None:
                stack.pop()
                colour[name] = 2
                post.append(name)
                continue
            state = colour.get(child, 0)
            if state == 1:
                raise _err(lib.path, f"reference cycle: structure {child!r} contains itself (via {name!r})")
            if state == 0:
                if depth + 1 > max_depth:
                    raise _err(lib.path, f"references nested deeper than {max_depth} levels (at {child!r})")
                colour[child] = 1
                stack.append((child, depth + 1, iter(sorted({r.child for r in cells[child].refs}))))
    return tops, post[::-1]


def _flat_sizes(lib: _Library, order: list[str]) -> dict[str, tuple[int, int]]:
    """Flattened (polygons, vertices) per cell, in exact Python integers (children before parents)."""
    sizes: dict[str, tuple[int, int]] = {}
    for name in reversed(order):
        c = lib.cells[name]
        p, v = c.own_counts()
        for r in c.refs:
            cp, cv = sizes[r.child]
            p += r.count * cp
            v += r.count * cv
        sizes[name] = (p, v)
    return sizes


def _instance_counts(lib: _Library, tops: list, order: list, sizes: dict) -> dict[str, int]:
    """How many times each reachable cell with polygons below it is placed in the flattened result (exact ints,
    parents before children). Placements of cells without polygons are never expanded, so they are not counted."""
    inst = {t: 1 for t in tops}
    for name in order:
        if name not in inst:
            continue
        for r in lib.cells[name].refs:
            if sizes[r.child][0]:
                inst[r.child] = inst.get(r.child, 0) + inst[name] * r.count
    return inst


#: Bytes the flattening holds per polygon of the result: layer and datatype (int32), vertex count and start (int64).
FLAT_BYTES_PER_POLYGON = 24
#: Bytes per vertex of the result: x and y as int64.
FLAT_BYTES_PER_VERTEX = 16
#: Bytes per expanded placement: its affine map (6 float64) in the per-cell list, the concatenated copy, and the
#: temporaries of composing it with the child's placements (measured with ``bench/bench_read_budget.py``).
FLAT_BYTES_PER_PLACEMENT = 160


def flatten_bytes(polygons: int, vertices: int, placements: int) -> int:
    """Estimated peak bytes of flattening ``polygons`` / ``vertices`` through ``placements`` expanded placements.

    ``24 P + 16 V + 160 I`` (see :data:`FLAT_BYTES_PER_POLYGON`, :data:`FLAT_BYTES_PER_VERTEX`,
    :data:`FLAT_BYTES_PER_PLACEMENT`); decoding temporaries are chunked (a few tens of MB whatever the size).
    """
    return (FLAT_BYTES_PER_POLYGON * int(polygons) + FLAT_BYTES_PER_VERTEX * int(vertices)
            + FLAT_BYTES_PER_PLACEMENT * int(placements))


def _compose(parent: np.ndarray, child: np.ndarray) -> np.ndarray:
    """All compositions parent_i o child_j, shape (m*r, 6): x -> Ap (Ac x + tc) + tp."""
    pa, pb, pc, pd, px, py = (parent[:, None, i] for i in range(6))
    ca, cb, cc, cd, cx, cy = (child[None, :, i] for i in range(6))
    out = np.stack([pa * ca + pb * cc, pa * cb + pb * cd, pc * ca + pd * cc, pc * cb + pd * cd,
                    pa * cx + pb * cy + px, pc * cx + pd * cy + py], axis=-1)
    return out.reshape(-1, 6)


def _cell_geometry(lib: _Library, c: _Cell):
    """Decode a cell's own polygons: (layer, datatype, counts, xy) with xy int64."""
    lays, dts, cnts, xys = [], [], [], []
    for r in c.runs:
        for lo in range(0, r.k, _DECODE_CHUNK):
            hi = min(r.k, lo + _DECODE_CHUNK)
            lay, dt, cnt, xy = _decode_run(lib.buf, r, lo, hi)
            lays.append(lay), dts.append(dt), cnts.append(cnt), xys.append(xy)
    for e in c.explicit:
        lays.append(e.layer), dts.append(e.datatype), cnts.append(e.counts), xys.append(e.xy)
    if not lays:
        z = np.zeros(0, np.int32)
        return z, z, np.zeros(0, np.int64), np.zeros((0, 2), np.int64)
    return (np.concatenate(lays), np.concatenate(dts), np.concatenate(cnts).astype(np.int64),
            np.concatenate(xys))


def _decode_run(buf, r: _Run, lo: int, hi: int):
    keep, closed = r.keep[lo:hi], r.closed[lo:hi]
    if not keep.any():
        return (np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.int64), np.zeros((0, 2), np.int64))
    xy = _field(buf, r.pos + lo * r.size, hi - lo, r.size, r.xy_off, ">i4", (r.n_xy, 2))
    if keep.all() and closed.all():
        out = xy[:, :-1, :].astype(np.int64).reshape(-1, 2)
        cnt = np.full(hi - lo, r.n_xy - 1, np.int64)
    else:
        vmask = np.ones((hi - lo, r.n_xy), bool)
        vmask[closed, -1] = False
        vmask &= keep[:, None]
        out = xy[vmask].astype(np.int64)
        cnt = vmask.sum(axis=1)[keep].astype(np.int64)
    return r.layer[lo:hi][keep], r.datatype[lo:hi][keep], cnt, out


class _FlatOut:
    """Output arrays of a flattening, filled polygon by polygon block in order."""

    def __init__(self, total_p: int, total_v: int):
        self.layer = np.empty(total_p, np.int32)
        self.datatype = np.empty(total_p, np.int32)
        self.counts = np.empty(total_p, np.int64)
        self.xy = np.empty((total_v, 2), np.int64)
        self.ip = self.iv = 0

    def put(self, layer, datatype, counts, xy) -> None:
        """Append polygons (per-polygon arrays of length n, vertices (m, 2))."""
        n, m = layer.shape[0], xy.shape[0]
        self.layer[self.ip:self.ip + n], self.datatype[self.ip:self.ip + n] = layer, datatype
        self.counts[self.ip:self.ip + n] = counts
        self.xy[self.iv:self.iv + m] = xy
        self.ip, self.iv = self.ip + n, self.iv + m


def _placements(lib: _Library, tops: list, order: list, sizes: dict) -> dict:
    """Affine placements of every cell that holds polygons (parents first); call only after the counts passed."""
    inst: dict[str, list] = {t: [np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])] for t in tops}
    for name in order:
        if name not in inst:
            continue
        parent = np.concatenate(inst[name]) if len(inst[name]) > 1 else inst[name][0]
        inst[name] = [parent]
        for r in lib.cells[name].refs:
            if sizes[r.child][0] == 0:
                continue
            inst.setdefault(r.child, []).append(_compose(parent, r.affine()))
    return inst


def _put_in_place(lib: _Library, c: _Cell, out: _FlatOut) -> None:
    """A cell placed once without transform: runs stream straight into the output, chunk by chunk."""
    for r in c.runs:
        for lo in range(0, r.k, _DECODE_CHUNK):
            out.put(*_decode_run(lib.buf, r, lo, min(r.k, lo + _DECODE_CHUNK)))
    for e in c.explicit:
        out.put(e.layer, e.datatype, e.counts, e.xy)


def _put_placed(lib: _Library, c: _Cell, aff: np.ndarray, out: _FlatOut) -> None:
    """A cell at every placement ``aff`` (m, 6): integer translations exactly, other maps rounded to the grid."""
    lay, dt, cnt, pts = _cell_geometry(lib, c)
    translate_only = np.all(aff[:, :4] == [1.0, 0.0, 0.0, 1.0]) and np.all(aff[:, 4:] == np.rint(aff[:, 4:]))
    step = max(1, _DECODE_CHUNK * 4 // max(1, pts.shape[0]))
    ptsf = pts.astype(np.float64)
    for lo in range(0, aff.shape[0], step):
        a = aff[lo:lo + step]
        m = a.shape[0]
        if translate_only:
            placed = pts[None, :, :] + a[:, None, 4:].astype(np.int64)
        else:
            x = ptsf[None, :, 0]
            y = ptsf[None, :, 1]
            placed = np.stack([a[:, 0:1] * x + a[:, 1:2] * y + a[:, 4:5],
                               a[:, 2:3] * x + a[:, 3:4] * y + a[:, 5:6]], axis=-1)
            placed = np.rint(placed).astype(np.int64)
            # a reflection (det < 0) reverses the vertex order; keep it as written (orientation is not used)
        out.put(np.tile(lay, m), np.tile(dt, m), np.tile(cnt, m), placed.reshape(-1, 2))


def _flat_totals(lib: _Library, tops: list, sizes: dict, *, max_elements: int, max_vertices: int) -> tuple:
    """Polygons and vertices of the flattened tops; refused, naming the count, over the element or vertex limit."""
    total_p = sum(sizes[t][0] for t in tops)
    total_v = sum(sizes[t][1] for t in tops)
    if total_p > max_elements:
        raise _err(lib.path, f"{total_p} polygons after resolving references exceed the limit max_elements="
                             f"{max_elements}")
    if total_v > max_vertices:
        raise _err(lib.path, f"{total_v} vertices after resolving references exceed the limit max_vertices="
                             f"{max_vertices}")
    return total_p, total_v


def _admit(lib: _Library, tops: list, order: list, sizes: dict, *, max_elements: int, max_vertices: int,
           max_memory_bytes: int | None) -> None:
    """Refuse, naming the count, a flattening over the element, vertex or placement limit or the memory budget."""
    total_p, total_v = _flat_totals(lib, tops, sizes, max_elements=max_elements, max_vertices=max_vertices)
    n_inst = sum(_instance_counts(lib, tops, order, sizes).values())
    need = flatten_bytes(total_p, total_v, n_inst)
    budget = memory_budget(max_memory_bytes)
    if need > budget:
        raise _err(lib.path, f"flattening {total_p} polygons ({total_v} vertices, {n_inst} placements) needs about "
                             f"{format_bytes(need)}, more than the memory budget of {format_bytes(budget)} "
                             "(--max-memory; default half of the memory this process may use)")
    if n_inst > max_elements:
        raise _err(lib.path, f"{n_inst} reference placements to expand exceed the limit max_elements="
                             f"{max_elements}")


def _flatten(lib: _Library, cell: str | None, max_elements: int, max_vertices: int, max_depth: int,
             max_memory_bytes: int | None = None) -> FlatPolygons:
    """Stage 3 of reading: every polygon of the top cell(s) in place, sizes counted before anything is allocated."""
    tops, order = _topology(lib, cell, max_depth)
    sizes = _flat_sizes(lib, order)
    _admit(lib, tops, order, sizes, max_elements=max_elements, max_vertices=max_vertices,
           max_memory_bytes=max_memory_bytes)
    total_p = sum(sizes[t][0] for t in tops)
    total_v = sum(sizes[t][1] for t in tops)
    inst = _placements(lib, tops, order, sizes)
    out = _FlatOut(total_p, total_v)
    for name in order:
        if name not in inst:
            continue
        c = lib.cells[name]
        if c.own_counts()[0] == 0:
            continue
        aff = inst[name][0]
        if aff.shape[0] == 1 and np.array_equal(aff[0], [1.0, 0.0, 0.0, 1.0, 0.0, 0.0]):
            _put_in_place(lib, c, out)
        else:
            _put_placed(lib, c, aff, out)
    assert out.ip == total_p and out.iv == total_v
    start = np.zeros(total_p + 1, np.int64)
    np.cumsum(out.counts, out=start[1:])
    return FlatPolygons(out.layer, out.datatype, start, out.xy, _nm_from_m(lib.db_unit_m), float(lib.user_unit_m))


def _nm_from_m(db_unit_m: float) -> float:
    """The one place where the file's database unit (metres, as GDSII and OASIS store it) becomes nanometres."""
    return float(db_unit_m) * 1e9


# ----------------------------------------------------------------------------------------------------------------
# Public entry points
# ----------------------------------------------------------------------------------------------------------------

def _make_filter(layers):
    if layers is None:
        return lambda lay, dt: np.ones(lay.shape[0], bool)
    pairs, whole = set(), set()
    for item in layers:
        if isinstance(item, (tuple, list)):
            pairs.add(int(item[0]) * 65536 + int(item[1]))
        else:
            whole.add(int(item))
    pk = np.array(sorted(pairs), np.int64)
    wk = np.array(sorted(whole), np.int64)

    def keep(lay, dt):
        lay, dt = np.asarray(lay, np.int64), np.asarray(dt, np.int64)
        if lay.size > 1 and (lay == lay[0]).all() and (dt == dt[0]).all():  # a run on one layer: test it once
            return np.full(lay.shape, bool(keep(lay[:1], dt[:1])[0]))
        return np.isin(lay * 65536 + dt, pk) | np.isin(lay, wk)

    return keep


def mask_format(path) -> str:
    """``"GDSII"`` or ``"OASIS"`` from a mask file's first bytes (a one-line MaskReadError for anything else)."""
    return _sniff(os.fspath(path))


def _sniff(path: str) -> str:
    p = Path(path)
    try:
        if not p.exists():
            raise _err(path, "file not found")
        if not p.is_file():
            raise _err(path, "not a regular file")
        with open(p, "rb") as fh:
            head = fh.read(16)
    except OSError as exc:  # permission denied, I/O error: unreadable, like a malformed file
        raise _err(path, f"cannot read ({exc.strerror or exc})") from exc
    if head.startswith(b"%SEMI-OASIS"):
        return "OASIS"
    if len(head) >= 4 and head[2:4] == b"\x00\x02":
        return "GDSII"
    raise _err(path, "not a GDSII or OASIS file (unrecognised first bytes)")


def _parse(path, layers=None, max_elements: int = DEFAULT_MAX_ELEMENTS, max_vertices: int = DEFAULT_MAX_VERTICES,
           max_memory_bytes: int | None = None, release=None):
    path = os.fspath(path)
    fmt = _sniff(path)
    filt = _make_filter(layers)
    if fmt == "OASIS":
        return _read_oasis(path, filt, max_elements, max_vertices, max_memory_bytes), None
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise _err(path, f"cannot read ({exc.strerror or exc})") from exc
    try:
        size = os.fstat(fh.fileno()).st_size
        mm = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
    except (ValueError, OSError) as exc:
        raise _err(path, f"cannot map file ({exc})") from exc
    finally:
        fh.close()
    buf = np.frombuffer(mm, dtype=np.uint8, count=size)
    return _walk_gdsii(_Records(path, mm, buf, release), filt, max_elements), mm


def read_mask(path, *, layers=None, cell: str | None = None, max_elements: int = DEFAULT_MAX_ELEMENTS,
              max_vertices: int = DEFAULT_MAX_VERTICES, max_depth: int = DEFAULT_MAX_DEPTH,
              max_memory_bytes: int | None = None) -> FlatPolygons:
    """Read a GDSII or OASIS mask and return every polygon flattened to database-unit integers.

    Parameters
    ----------
    path : str or os.PathLike
        GDSII stream (``.gds``) or OASIS (``.oas``) file; the format is recognised from the first bytes.
    layers : iterable of int or (int, int), optional
        Keep only these layers (an int keeps every datatype of that layer). Default: all.
    cell : str, optional
        Flatten this structure. Default: every top structure (one not referenced by another).
    max_elements, max_vertices, max_depth : int
        Limits on flattened polygons (and on expanded reference placements), flattened vertices and nesting
        depth; checked before the output is allocated.
    max_memory_bytes : int, optional
        Memory budget of the read; default :func:`metalay.util.budget.memory_budget` (half of the least of the
        memory available, the free part of the cgroup limit and of the address-space limit). The flattened size
        (:func:`flatten_bytes`) is compared with it before anything is expanded.

    Returns
    -------
    FlatPolygons

    Raises
    ------
    MaskReadError
        Unreadable, truncated or malformed file; undefined or cyclic references; limits or the memory budget
        exceeded (the message names the count).

    Notes
    -----
    Every SREF/AREF is kept as a count (an AREF is cols x rows placements, exact integers) until the fan-out of
    the whole hierarchy is known; placements of cells without polygons are never expanded.
    BOUNDARY and BOX elements become polygons (a repeated closing point is dropped); PATH elements are outlined
    (width from WIDTH, ends from PATHTYPE 0/1/2/4, mitred joins) and rounded to the database grid; TEXT and NODE
    carry no area and are skipped.  A placement maps x -> R(angle) * mag * F x + origin with F = diag(1, -1)
    when STRANS bit 0 (reflection about x) is set; transformed vertices are rounded half-to-even to the grid.
    AREF element positions are origin + i*(P2-origin)/cols + j*(P3-origin)/rows.

    References
    ----------
    Calma GDSII Stream Format Manual, Release 6.0 (1987): record layout, 8-byte real format, AREF/STRANS rules.
    """
    lib, mm = _parse(path, layers, max_elements, max_vertices, max_memory_bytes)
    try:
        return _flatten(lib, cell, max_elements, max_vertices, max_depth, max_memory_bytes)
    except MemoryError as exc:
        raise _err(lib.path, "out of memory while flattening (lower the input size or max_elements)") from exc
    finally:
        lib.buf = None
        if mm is not None:
            try:
                mm.close()
            except BufferError:
                pass  # a view is still alive; the mapping closes when it is collected


def file_sha256(path) -> str:
    """SHA-256 hex digest of a file, read in 8 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 23), b""):
            h.update(chunk)
    return h.hexdigest()


def _sha256_of_input(path: str) -> str:
    try:
        return file_sha256(path)
    except OSError as exc:
        raise _err(path, f"cannot read ({exc.strerror or exc})") from exc


_KIND_NAMES = {_BOUNDARY: "boundary", _PATH: "path", _SREF: "sref", _AREF: "aref", _TEXT: "text", _NODE: "node",
               _BOX: "box"}


def mask_info(path, *, max_elements: int = DEFAULT_MAX_ELEMENTS, max_vertices: int = DEFAULT_MAX_VERTICES,
              max_depth: int = DEFAULT_MAX_DEPTH, max_memory_bytes: int | None = None) -> dict:
    """Summarise a mask: format, units, structures, layers with flattened polygon counts, bbox, SHA-256.

    Returns
    -------
    dict
        Keys ``path``, ``format``, ``size_bytes``, ``sha256``, ``db_unit_m``, ``user_unit_m``, ``cells`` (list of
        {name, elements: {kind: count}, references}), ``top_cells``, ``layers`` (list of {layer, datatype,
        polygons} after flattening), ``polygons``, ``vertices``, ``bbox_db`` ([xmin, ymin, xmax, ymax] or None)
        and ``bbox_um``.  Lists are sorted, so the dict is deterministic.
    """
    path = os.fspath(path)
    lib, mm = _parse(path, None, max_elements, max_vertices, max_memory_bytes)
    try:
        tops, order = _topology(lib, None, max_depth)
        sizes = _flat_sizes(lib, order)
        flat = _flatten(lib, None, max_elements, max_vertices, max_depth, max_memory_bytes)
    except MemoryError as exc:
        raise _err(lib.path, "out of memory while flattening (lower the input size or max_elements)") from exc
    finally:
        lib.buf = None
        if mm is not None:
            try:
                mm.close()
            except BufferError:
                pass
    key = flat.layer.astype(np.int64) * 65536 + flat.datatype
    u, cnt = np.unique(key, return_counts=True)
    layers = [{"layer": int(k // 65536), "datatype": int(k % 65536), "polygons": int(c)} for k, c in zip(u, cnt)]
    if flat.xy_db.shape[0]:
        lo, hi = flat.xy_db.min(axis=0), flat.xy_db.max(axis=0)
        bbox = [int(lo[0]), int(lo[1]), int(hi[0]), int(hi[1])]
    else:
        bbox = None
    um = lib.db_unit_m / 1e-6
    cells = []
    for name in sorted(lib.cells):
        c = lib.cells[name]
        cells.append({"name": name,
                      "elements": {_KIND_NAMES[k]: int(v) for k, v in sorted(c.n_elements.items())},
                      "references": sorted({r.child for r in c.refs}),
                      "flattened_polygons": int(sizes[name][0]) if name in sizes else None})
    return {
        "path": path,
        "format": lib.fmt,
        "size_bytes": os.path.getsize(path),
        "sha256": _sha256_of_input(path),
        "db_unit_m": lib.db_unit_m,  # the file's own value (output key kept)
        "user_unit_m": flat.user_unit_m,
        "cells": cells,
        "top_cells": sorted(tops),
        "layers": layers,
        "polygons": flat.count,
        "vertices": int(flat.xy_db.shape[0]),
        "bbox_db": bbox,
        "bbox_um": None if bbox is None else [v * um for v in bbox],
    }
