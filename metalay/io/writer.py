"""Mask writers: the streaming GDSII writer of the compile, and gdstk builders kept as the benchmarks' baseline.

GDSII
    Written by :class:`GdsStream`, a vectorised writer of GDSII Stream Format records: each tile's elements
    become one big-endian int32 array of BOUNDARY records (or a uint8 array of SREF records,
    :func:`sref_records`) written in one call. Records of other structures than the top one (rotation-level
    masters, write-field cells) are spooled to a temporary file and copied out at the end, so hierarchical files
    stream as well. gdstk's ``write_gds`` holds the whole library in memory and expands every repetition (see
    DEVELOPERS.md); gdstk reads these files back in the tests, and an independent minimal parser checks the records.
gdstk builders
    :func:`build_gdstk_flat`, :func:`build_gdstk_levels`, :func:`build_gdstk_fields` and
    :func:`write_gdstk_library` hold every site in memory; the compile no longer uses them (OASIS is written by
    :class:`metalay.io.oasis_write.OasisStream`), the benchmarks measure against them.

Every file is written to a temporary name in the output folder and renamed when complete; timestamps are fixed
(1970-01-01 00:00:00) so the same input gives the same bytes.

References
----------
Calma Company, GDSII Stream Format Manual, Release 6.0 (1987): record layout, 8-byte real format, the limit of
8191 XY points per element (8190 distinct vertices plus the closing one).
"""

from __future__ import annotations

import datetime
import errno
import hashlib
import os
import shutil
import struct
import tempfile
from pathlib import Path

import numpy as np

from metalay.errors import OutputError
from metalay.mask.layout import Polygon, SnappedRows
from metalay.util.atomic import atomic_path

__all__ = [
    "GdsStream",
    "copy_spooled",
    "add_polygons",
    "build_gdstk_fields",
    "boundary_records",
    "boundary_records_rows",
    "sref_records",
    "gds_real8",
    "write_gdstk_library",
    "build_gdstk_flat",
    "build_gdstk_levels",
    "FIXED_TIMESTAMP",
    "MAX_GDS_VERTICES",
]

FIXED_TIMESTAMP = datetime.datetime(1970, 1, 1, 0, 0, 0)
#: Largest number of distinct vertices of one GDSII boundary (8191 XY points including the closing point).
MAX_GDS_VERTICES = 8190

_HEADER, _BGNLIB, _LIBNAME, _UNITS, _ENDLIB = 0x0002, 0x0102, 0x0206, 0x0305, 0x0400
_BGNSTR, _STRNAME, _ENDSTR = 0x0502, 0x0606, 0x0700
_BOUNDARY, _LAYER, _DATATYPE, _XY, _ENDEL = 0x0800, 0x0D02, 0x0E02, 0x1003, 0x1100
_SREF, _SNAME = 0x0A00, 0x1206


def gds_real8(value: float) -> bytes:
    """Encode ``value`` as a GDSII 8-byte real (sign bit, 7-bit excess-64 base-16 exponent, 56-bit mantissa)."""
    if value == 0:
        return b"\x00" * 8
    sign = 0x80 if value < 0 else 0
    v = abs(value)
    exponent = 64
    while v >= 1.0:
        v /= 16.0
        exponent += 1
    while v < 1.0 / 16.0:
        v *= 16.0
        exponent -= 1
    mantissa = int(round(v * (1 << 56)))
    if mantissa >= 1 << 56:  # rounding carried into the next hex digit
        mantissa >>= 4
        exponent += 1
    return bytes([sign | exponent]) + mantissa.to_bytes(7, "big")


def _record(rtype: int, payload: bytes = b"") -> bytes:
    if len(payload) % 2:
        payload += b"\x00"
    return struct.pack(">HH", 4 + len(payload), rtype) + payload


def _string(rtype: int, text: str) -> bytes:
    return _record(rtype, text.encode("ascii"))


def _date_payload() -> bytes:
    t = FIXED_TIMESTAMP
    one = struct.pack(">6h", t.year, t.month, t.day, t.hour, t.minute, t.second)
    return one + one


def copy_spooled(spool, pieces, write, path) -> None:
    """Copy the spooled byte ranges ``pieces`` ((offset, length) pairs) of ``spool`` through ``write``, 8 MB at a
    time (the cells that are not the top one, written to a temporary file while the top one streams)."""
    for off, n in pieces:
        spool.seek(off)
        left = n
        while left:
            chunk = spool.read(min(left, 8 << 20))
            if not chunk:
                raise OutputError(f"{path}: temporary cell data lost")
            write(chunk)
            left -= len(chunk)


class GdsStream:
    """Stream a GDSII library tile by tile: one top structure, optionally more structures (cells) spooled aside.

    Use as a context manager; the file appears at ``path`` only when the block ends without error. Records for the
    top structure go straight to the file; records for another cell (``cell=``: a rotation-level master, a write
    field) are spooled to an unnamed temporary file beside the output and copied out, one structure per cell in
    the order the cells were first used, after the top structure ends. Memory stays bounded by one tile.

    Parameters
    ----------
    path : str or Path
        Output file.
    cell_name : str
        Name of the top structure.
    db_unit_nm : float
        Database unit in nm (user unit is 1 um).

    Attributes
    ----------
    sha256 : str or None
        SHA-256 (hex) of the whole file, set when the block ends without error.
    element_count : int
        Elements written (boundaries and references, in every structure).
    """

    def __init__(self, path, cell_name: str, *, db_unit_nm: float = 1.0):
        self.path = Path(path)
        self.cell_name = cell_name
        self.db_unit_nm = db_unit_nm
        self.element_count = 0
        self.sha256 = None  # hex digest of the whole file, set when the block ends
        self._hash = hashlib.sha256()
        self._ctx = None
        self._fh = None
        self._spool = None
        self._spooled: dict[str, list[tuple[int, int]]] = {}

    def _write(self, data) -> None:
        self._fh.write(data)
        self._hash.update(data)

    def __enter__(self):
        self._ctx = atomic_path(self.path)
        tmp = self._ctx.__enter__()
        self._fh = open(tmp, "wb", buffering=8 << 20)
        db_in_user = self.db_unit_nm / 1000.0
        db_in_m = self.db_unit_nm * 1e-9
        head = (_record(_HEADER, struct.pack(">h", 600)) + _record(_BGNLIB, _date_payload())
                + _string(_LIBNAME, "METALAY") + _record(_UNITS, gds_real8(db_in_user) + gds_real8(db_in_m))
                + _record(_BGNSTR, _date_payload()) + _string(_STRNAME, self.cell_name))
        self._write(head)
        return self

    def boundaries(self, layer: int, datatype: int, vertices_db: np.ndarray, *, cell: str | None = None) -> None:
        """Write ``vertices_db`` (N, V, 2) integer coordinates as N BOUNDARY elements (closing point added)."""
        self.write_records(boundary_records(layer, datatype, vertices_db, where=str(self.path)), cell=cell)

    def write_records(self, records: np.ndarray | None, *, cell: str | None = None) -> None:
        """Write records made by :func:`boundary_records` or :func:`sref_records` (one row per element)."""
        if records is None or len(records) == 0:
            return
        self.write_bytes(memoryview(np.ascontiguousarray(records)).cast("B"), len(records), cell=cell)

    def write_bytes(self, data, elements: int, *, cell: str | None = None) -> None:
        """Write element records already encoded as bytes (``elements`` of them) into ``cell`` (default: top)."""
        self.element_count += int(elements)
        if cell is None or cell == self.cell_name:
            if len(data):
                self._write(data)
            return
        _check_name(cell, str(self.path))
        if self._spool is None:
            self._spool = tempfile.TemporaryFile(dir=self.path.parent)
        off = self._spool.seek(0, 2)
        self._spool.write(data)
        self._spooled.setdefault(cell, []).append((off, len(data)))

    def polygons(self, polys: list[Polygon], *, cell: str | None = None) -> None:
        """Write a few individual polygons (frame, label, marks)."""
        for p in polys:  # a handful of polygons, not sites
            self.boundaries(p.layer, p.datatype, np.asarray(p.xy_db, dtype=np.int64)[None], cell=cell)

    def define_cell(self, name: str) -> None:
        """Make sure cell ``name`` is written as a structure even when nothing was added to it."""
        _check_name(name, str(self.path))
        self._spooled.setdefault(name, [])

    def _finish(self) -> None:
        self._write(_record(_ENDSTR))
        for name, pieces in self._spooled.items():  # cells in the order of first use
            self._write(_record(_BGNSTR, _date_payload()) + _string(_STRNAME, name))
            copy_spooled(self._spool, pieces, self._write, self.path)
            self._write(_record(_ENDSTR))
        self._write(_record(_ENDLIB))
        self.sha256 = self._hash.hexdigest()

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                self._finish()
        except BaseException as err:  # a failed final write: the partial file is discarded, the error propagates
            self._close()
            self._ctx.__exit__(type(err), err, err.__traceback__)
            raise
        self._close()
        return self._ctx.__exit__(exc_type, exc, tb)

    def _close(self) -> None:
        for fh in (self._fh, self._spool):
            if fh is not None:
                fh.close()


def _check_name(name: str, where: str) -> None:
    """Structure names: 1 or more printable ASCII characters without spaces (0x21-0x7E), like the top cell's."""
    if not (name and all(0x21 <= ord(c) <= 0x7E for c in name)):
        raise OutputError(f"{where}: structure name {name!r} (allowed: printable ASCII characters, no spaces)")


def sref_records(cell: str, centres_db: np.ndarray, *, where: str = "GDSII") -> np.ndarray:
    """GDSII SREF records placing structure ``cell`` (no rotation, no reflection) at each of ``centres_db`` (N, 2).

    Returns an (N, bytes) uint8 array, one row per element: SREF, SNAME, XY (one point), ENDEL. Pure function of
    its inputs (tiles can be encoded in worker threads).
    """
    c = np.asarray(centres_db, dtype=np.int64).reshape(-1, 2)
    if c.size and (c.min() < -(2 ** 31) or c.max() >= 2 ** 31):
        raise OutputError(f"{where}: coordinates exceed the 32-bit range of GDSII at this database unit")
    head = np.frombuffer(_record(_SREF) + _string(_SNAME, cell) + struct.pack(">HH", 12, _XY), np.uint8)
    tail = np.frombuffer(_record(_ENDEL), np.uint8)
    rows = np.empty((c.shape[0], head.size + 8 + tail.size), np.uint8)
    rows[:, :head.size] = head
    rows[:, head.size:head.size + 8] = c.astype(">i4").view(np.uint8).reshape(-1, 8)
    rows[:, head.size + 8:] = tail
    return rows


def boundary_records(layer: int, datatype: int, vertices_db: np.ndarray | None = None, *,
                     centres_db: np.ndarray | None = None, offsets_db: np.ndarray | None = None,
                     where: str = "GDSII") -> np.ndarray:
    """GDSII BOUNDARY records for N polygons of V vertices, as an (N, words) big-endian int32 array.

    Give either absolute ``vertices_db`` (N, V, 2) or ``centres_db`` (N, 2) plus ``offsets_db`` (N, V, 2).
    Each row is BOUNDARY, LAYER, DATATYPE, XY (V + 1 points, closed), ENDEL: 64 bytes for a 4-vertex element.
    Pure function of its inputs, so tiles can be encoded in worker threads.
    """
    if vertices_db is not None:
        offsets_db = vertices_db
        centres_db = np.zeros((vertices_db.shape[0], 2), dtype=np.int64)
    n, nv, _ = offsets_db.shape
    lo = centres_db.min(initial=0) + offsets_db.min(initial=0)
    hi = centres_db.max(initial=0) + offsets_db.max(initial=0)
    if lo < -(2 ** 31) or hi >= 2 ** 31:
        raise OutputError(f"{where}: coordinates exceed the 32-bit range of GDSII at this database unit")
    rows = np.ascontiguousarray(offsets_db.reshape(n, 2 * nv).T).astype(np.int32, copy=False)
    return boundary_records_rows(layer, datatype, centres_db, SnappedRows(rows, nv, False, 0.0), where=where)


def boundary_records_rows(layer: int, datatype: int, centres_db: np.ndarray, snapped, *,
                          where: str = "GDSII") -> np.ndarray:
    """GDSII BOUNDARY records from site centres and :class:`metalay.mask.layout.SnappedRows` (fast path).

    Same bytes as :func:`boundary_records`; the record words are filled as contiguous rows (one per word, over all
    elements) and transposed once, which is several times faster than strided writes per element.
    """
    rows = snapped.rows
    n = rows.shape[1]
    nv = snapped.n_vertices
    k = rows.shape[0] // 2
    if nv > MAX_GDS_VERTICES:
        raise OutputError(f"{where}: polygon with {nv} vertices exceeds the GDSII limit of {MAX_GDS_VERTICES}")
    reach = int(np.abs(rows).max(initial=0))
    lo, hi = centres_db.min(initial=0) - reach, centres_db.max(initial=0) + reach
    if lo < -(2 ** 31) or hi >= 2 ** 31:
        raise OutputError(f"{where}: coordinates exceed the 32-bit range of GDSII at this database unit")
    cx = centres_db[:, 0].astype(np.int32)
    cy = centres_db[:, 1].astype(np.int32)
    nxy = 2 * (nv + 1)
    words = 1 + 3 + 1 + nxy + 1
    head = np.array([(4 << 16) | _BOUNDARY, (6 << 16) | _LAYER, ((layer & 0xFFFF) << 16) | 6,
                     (_DATATYPE << 16) | (datatype & 0xFFFF), ((4 + 4 * nxy) << 16) | _XY], dtype=np.uint32)
    rt = np.empty((words, n), dtype=np.int32)
    rt[:5] = head.view(np.int32)[:, None]
    for v in range(nv):  # vertices of one outline (a short axis), contiguous over elements
        src, sign = (v, 1) if v < k else (v - k, -1)
        op = np.add if sign > 0 else np.subtract
        op(cx, rows[2 * src], out=rt[5 + 2 * v])
        op(cy, rows[2 * src + 1], out=rt[6 + 2 * v])
    rt[5 + 2 * nv] = rt[5]
    rt[6 + 2 * nv] = rt[6]
    rt[5 + nxy] = (4 << 16) | _ENDEL
    rec = np.ascontiguousarray(rt.T)
    return rec.byteswap(inplace=True).view(">i4") if np.little_endian else rec.view(">i4")


def _gdstk():
    import gdstk

    return gdstk


def build_gdstk_flat(cell_name: str, groups: list[tuple[int, int, np.ndarray, np.ndarray]],
                     extras: list[Polygon], *, db_unit_nm: float):
    """A gdstk library with one top cell: one polygon + explicit-offset repetition per distinct shape.

    Parameters
    ----------
    groups : list of (layer, datatype, shape_db (V, 2), centres_db (M, 2))
        Each distinct snapped shape with the centres of the sites that use it.
    """
    gdstk = _gdstk()
    s = db_unit_nm / 1000.0
    lib = gdstk.Library("METALAY", unit=1e-6, precision=db_unit_nm * 1e-9)
    cell = lib.new_cell(cell_name)
    for layer, datatype, shape, centres in groups:
        first = centres[0]
        poly = gdstk.Polygon((shape + first) * s, layer=layer, datatype=datatype)
        if len(centres) > 1:
            # an explicit repetition always includes offset (0, 0): give the others relative to the first site
            poly.repetition = gdstk.Repetition(offsets=(centres[1:] - first) * s)
        cell.add(poly)
    for p in extras:
        cell.add(gdstk.Polygon(p.xy_db * s, layer=p.layer, datatype=p.datatype))
    return lib


def build_gdstk_levels(cell_name: str, level_shapes: list[tuple[int, int, np.ndarray]],
                       level_centres: list[np.ndarray], extras: list[Polygon], *, db_unit_nm: float):
    """A gdstk library with one master cell per rotation level, placed by plain references with offsets."""
    gdstk = _gdstk()
    s = db_unit_nm / 1000.0
    lib = gdstk.Library("METALAY", unit=1e-6, precision=db_unit_nm * 1e-9)
    top = gdstk.Cell(cell_name)
    masters = []
    for k, ((layer, datatype, shape), centres) in enumerate(zip(level_shapes, level_centres)):
        if len(centres) == 0:
            continue
        master = gdstk.Cell(f"{cell_name}_R{k:04d}")
        master.add(gdstk.Polygon(shape * s, layer=layer, datatype=datatype))
        masters.append(master)
        first = centres[0]
        ref = gdstk.Reference(master, origin=tuple(first * s))
        if len(centres) > 1:
            ref.repetition = gdstk.Repetition(offsets=(centres[1:] - first) * s)
        top.add(ref)
    for p in extras:
        top.add(gdstk.Polygon(p.xy_db * s, layer=p.layer, datatype=p.datatype))
    lib.add(top, *masters)
    return lib


def build_gdstk_fields(cell_name: str, field_groups: dict, extras: list[Polygon], *, db_unit_nm: float,
                       field_names: dict):
    """A gdstk library with one cell per write field, each placed by a plain reference at the origin.

    Parameters
    ----------
    field_groups : dict (ix, iy) -> list of (layer, datatype, shape_db (V, 2), centres_db (M, 2))
        The elements of each field, grouped by exact snapped shape (one polygon + repetition per group).
    field_names : dict (ix, iy) -> str
        Cell name of each field.
    """
    gdstk = _gdstk()
    s = db_unit_nm / 1000.0
    lib = gdstk.Library("METALAY", unit=1e-6, precision=db_unit_nm * 1e-9)
    top = gdstk.Cell(cell_name)
    cells = []
    for key in sorted(field_groups):  # write fields (a few hundred), not sites
        cell = gdstk.Cell(field_names[key])
        for layer, datatype, shape, centres in field_groups[key]:
            first = centres[0]
            poly = gdstk.Polygon((shape + first) * s, layer=layer, datatype=datatype)
            if len(centres) > 1:
                poly.repetition = gdstk.Repetition(offsets=(centres[1:] - first) * s)
            cell.add(poly)
        cells.append(cell)
        top.add(gdstk.Reference(cell, origin=(0.0, 0.0)))
    for p in extras:
        top.add(gdstk.Polygon(p.xy_db * s, layer=p.layer, datatype=p.datatype))
    lib.add(top, *cells)
    return lib


def add_polygons(lib, cell_name: str, layer: int, datatype: int, vertex_arrays, *, db_unit_nm: float) -> None:
    """Add polygons given as integer arrays ``(n, V, 2)`` (database units) to the named cell of a gdstk library."""
    gdstk = _gdstk()
    s = db_unit_nm / 1000.0
    cell = next(c for c in lib.cells if c.name == cell_name)
    for arr in vertex_arrays:  # groups of pieces (per band and vertex count)
        for poly in arr:
            cell.add(gdstk.Polygon(poly * s, layer=layer, datatype=datatype))


def write_gdstk_library(lib, path, fmt: str) -> Path:
    """Write a gdstk library as ``fmt`` ("gds" or "oas") atomically with fixed timestamps.

    gdstk does not report failed writes (a full disk leaves a short file and no error), so the file must end the
    way its format ends (OASIS: the 256-byte END record, record id 2; GDSII: the ENDLIB record ``00 04 04 00``) or
    the write is refused: ``OSError(ENOSPC)`` when the disk is (nearly) full, else :class:`OutputError`.
    """
    with atomic_path(path) as tmp:
        if fmt == "gds":
            lib.write_gds(str(tmp), max_points=MAX_GDS_VERTICES + 1, timestamp=FIXED_TIMESTAMP)
        else:
            lib.write_oas(str(tmp), compression_level=1, detect_rectangles=False, detect_trapezoids=False,
                          standard_properties=False)
        _check_complete(tmp, fmt, Path(path))
    return Path(path)


def _check_complete(tmp: Path, fmt: str, final: Path) -> None:
    """Raise unless the file gdstk wrote at ``tmp`` ends with its format's closing record."""
    size = tmp.stat().st_size
    with open(tmp, "rb") as fh:
        if fmt == "oas":
            fh.seek(max(0, size - 256))
            ok = size >= 256 + 13 and fh.read(1) == b"\x02"
        else:
            fh.seek(max(0, size - 4))
            ok = fh.read(4) == b"\x00\x04\x04\x00"
    if ok:
        return
    free = shutil.disk_usage(tmp.parent).free
    if free < (4 << 20):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(final))
    label = "OASIS" if fmt == "oas" else "GDSII"
    raise OutputError(f"{final}: gdstk wrote an incomplete {label} file ({size} bytes, no closing record); "
                      f"{free / 1e6:.0f} MB free on its disk")
