"""Read OASIS (SEMI P39) masks into flat integer polygons, with every count checked before anything is expanded.

Pure Python + numpy (and the standard library's zlib for CBLOCK), so a hostile file can only raise a one-line
:class:`metalay.errors.MaskReadError` (exit code 3) naming the file, the byte offset and what was wrong; it cannot
crash the process. Three guards bound time and memory:

1. Every repetition's element count is computed as an exact Python int (a product of dimensions) before its
   positions exist; a cell's own geometry is admitted record by record against ``max_elements``,
   ``max_vertices`` and the memory budget.
2. After parsing, the flattened count of every cell is computed bottom-up through the placement hierarchy
   (fan-out products, exact ints), with cycles refused and nesting depth bounded, and compared with the limits
   and with the memory budget before any placement is expanded.
3. A CBLOCK inflates to at most its declared size, which must fit the memory budget and the deflate ratio limit.

Supported records: START/END (table offsets in either, validation none/CRC32/checksum32 verified), PAD,
CELLNAME, TEXTSTRING, PROPNAME, PROPSTRING, LAYERNAME, XNAME (implicit or explicit reference numbers), CELL (by
reference number or name), XYABSOLUTE/XYRELATIVE, PLACEMENT (both forms; any angle and magnification),
TEXT (skipped), RECTANGLE, POLYGON, PATH (outlined), TRAPEZOID (3 forms), CTRAPEZOID (26 types), CIRCLE
(polygonised), PROPERTY (parsed, skipped), XELEMENT/XGEOMETRY (skipped), CBLOCK (raw deflate).

The parser also serves the streamed read (:mod:`metalay.io._oasis_stream`): in its ``"count"`` mode it checks
and counts everything and keeps nothing expanded; in its ``"geometry"`` and ``"placements"`` modes it parses one
cell again from its CELL record and hands its queued records out, decoding only the runs they use.

References
----------
SEMI P39, OASIS - Open Artwork System Interchange Standard: file structure, records, modal variables, data types.
"""

from __future__ import annotations

import math
import mmap
import os
import zlib
from dataclasses import dataclass

import numpy as np

from metalay.errors import MaskReadError
from metalay.io import _oasis_batch as ob
from metalay.io import _oasis_codec as oc
from metalay.util.budget import memory_budget

__all__ = [
    "OasisLayout",
    "OasisCell",
    "Placement",
    "FlattenPlan",
    "parse_oasis",
    "plan_flatten",
    "circle_vertex_count",
    "flatten_layout",
    "read_oasis",
    "DEFAULT_CIRCLE_TOLERANCE_DB",
    "MAX_CIRCLE_VERTICES",
]

DEFAULT_CIRCLE_TOLERANCE_DB = 1.0
"""Largest distance (database units) between a CIRCLE and the polygon that replaces it, before vertex snapping."""
MAX_CIRCLE_VERTICES = 8190
"""Vertex cap of a polygonised circle (the GDSII limit); larger circles then deviate more than the tolerance."""
_DEFAULT_MAX_ELEMENTS = 100_000_000
_DEFAULT_MAX_VERTICES = 400_000_000
_DEFAULT_MAX_DEPTH = 64
_POLY_BYTES = 24       # layer 4 + datatype 4 + start/count 8 + 8 working
_VERTEX_BYTES = 16     # two int64 coordinates
_INSTANCE_BYTES = 48   # one float64 affine map (6 numbers)
_DEFLATE_MAX_RATIO = 1032  # deflate codes at most 258 bytes per 2 bits (RFC 1951 length/distance codes)
_FLAT_COORD_LIMIT = 2.0 ** 53
_GEOMETRY_KINDS = ("rectangle", "polygon", "path", "trapezoid", "ctrapezoid", "circle")


# ----------------------------------------------------------------------------------------------------------------
# Public data
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Placement:
    """One PLACEMENT record of a cell, unexpanded.

    Attributes
    ----------
    child : str
        Name of the placed cell.
    x, y : int
        Position (database units).
    linear : tuple of 4 float
        ``(a, b, c, d)`` of the map ``p -> [[a, b], [c, d]] p + (x, y) + offset``: rotation by the angle after
        magnification after the optional reflection about the x axis.
    repetition : Repetition or None
        Offsets added to (x, y) (unexpanded).
    offset : int
        Byte offset of the record (for messages).
    """

    child: str
    x: int
    y: int
    linear: tuple
    repetition: oc.Repetition | None
    offset: int

    @property
    def count(self) -> int:
        """Number of placements this record makes (exact Python int)."""
        return 1 if self.repetition is None else self.repetition.count

    def affine(self) -> np.ndarray:
        """All placements as affine rows ``(a, b, c, d, tx, ty)``, shape (count, 6) float64. Count first."""
        offs = np.zeros((1, 2), np.int64) if self.repetition is None else self.repetition.offsets()
        out = np.empty((offs.shape[0], 6), np.float64)
        out[:, :4] = self.linear
        out[:, 4] = offs[:, 0] + self.x
        out[:, 5] = offs[:, 1] + self.y
        return out


class OasisCell:
    """A cell: its own polygons (repetitions expanded, layer filter applied) and its placements.

    The polygons are kept as the chunks they were expanded in (``chunks``: a list of (layer, datatype, counts,
    xy)); the attributes below concatenate them on first use.

    Attributes
    ----------
    layer, datatype : ndarray (P,) int32
    counts : ndarray (P,) int64
        Vertices per polygon.
    xy : ndarray (N, 2) int64
        Concatenated vertices, database units.
    placements : list of Placement
    records : dict
        Records of each kind in this cell (``"polygon"``, ``"rectangle"``, ..., ``"placement"``, ``"text"``).
    """

    def __init__(self, name: str, chunks: list, placements: list, records: dict):
        self.name = name
        self.chunks = chunks
        self.placements = placements
        self.records = records
        self.n_polygons = int(sum(c[2].shape[0] for c in chunks))
        self.n_vertices = int(sum(c[3].shape[0] for c in chunks))

    def _joined(self, k: int, dtype, empty_shape):
        if not self.chunks:
            return np.zeros(empty_shape, dtype)
        if len(self.chunks) > 1:  # join once; later uses see one chunk
            self.chunks = [tuple(np.concatenate([c[j] for c in self.chunks]) for j in range(4))]
        return self.chunks[0][k].astype(dtype, copy=False)

    @property
    def layer(self) -> np.ndarray:
        return self._joined(0, np.int32, (0,))

    @property
    def datatype(self) -> np.ndarray:
        return self._joined(1, np.int32, (0,))

    @property
    def counts(self) -> np.ndarray:
        return self._joined(2, np.int64, (0,))

    @property
    def xy(self) -> np.ndarray:
        return self._joined(3, np.int64, (0, 2))


@dataclass
class OasisLayout:
    """A parsed OASIS file: units and cells in file order.

    Attributes
    ----------
    path : str
    db_unit_m : float
        Database unit in metres (``1e-6 / unit`` where ``unit`` is the START record's grid steps per micron).
    user_unit_m : float
        1e-6 (OASIS user unit is the micron).
    cells : dict of str -> OasisCell
    validation : str
        ``"none"``, ``"crc32"`` or ``"checksum32"`` (verified when present).
    """

    path: str
    db_unit_m: float
    user_unit_m: float
    cells: dict
    validation: str


# ----------------------------------------------------------------------------------------------------------------
# Shapes
# ----------------------------------------------------------------------------------------------------------------

def _rect(w: int, h: int) -> np.ndarray:
    return np.array([[0, 0], [w, 0], [w, h], [0, h]], np.int64)


def _trapezoid(w: int, h: int, da: int, db: int, vertical: bool) -> np.ndarray:
    """Vertices (counter-clockwise, from the lower left) of a TRAPEZOID in its w x h bounding box.

    Horizontal (O = 0): ``delta-a`` = x(top left) - x(bottom left), ``delta-b`` = x(top right) - x(bottom right).
    Vertical (O = 1): ``delta-a`` = y(bottom left) - y(bottom right), ``delta-b`` = y(top left) - y(top right).
    """
    if not vertical:
        return np.array([[max(0, -da), 0], [w - max(0, db), 0], [w - max(0, -db), h], [max(0, da), h]], np.int64)
    return np.array([[0, max(0, da)], [w, max(0, -da)], [w, h - max(0, db)], [0, h - max(0, -db)]], np.int64)


# CTRAPEZOID types 0-25: vertices as (x, y) with each coordinate a0 + a1*w + a2*h (SEMI P39, CTRAPEZOID table).
_CTRAP = {
    0: ("0 0", "0 h", "w-h h", "w 0"), 1: ("0 0", "0 h", "w h", "w-h 0"),
    2: ("0 0", "h h", "w h", "w 0"), 3: ("h 0", "0 h", "w h", "w 0"),
    4: ("0 0", "h h", "w-h h", "w 0"), 5: ("h 0", "0 h", "w h", "w-h 0"),
    6: ("0 0", "h h", "w h", "w-h 0"), 7: ("h 0", "0 h", "w-h h", "w 0"),
    8: ("0 0", "0 h", "w h-w", "w 0"), 9: ("0 0", "0 h-w", "w h", "w 0"),
    10: ("0 0", "0 h", "w h", "w w"), 11: ("0 w", "0 h", "w h", "w 0"),
    12: ("0 0", "0 h", "w h-w", "w w"), 13: ("0 w", "0 h-w", "w h", "w 0"),
    14: ("0 0", "0 h-w", "w h", "w w"), 15: ("0 w", "0 h", "w h-w", "w 0"),
    16: ("0 0", "0 w", "w 0"), 17: ("0 0", "0 w", "w w"), 18: ("0 0", "w w", "w 0"), 19: ("0 w", "w w", "w 0"),
    20: ("0 0", "h h", "2h 0"), 21: ("0 h", "2h h", "h 0"), 22: ("0 0", "0 2w", "w w"), 23: ("w 0", "0 w", "w 2w"),
    24: ("0 0", "0 h", "w h", "w 0"), 25: ("0 0", "0 w", "w w", "w 0"),
}


def _term(expr: str, w: int, h: int) -> int:
    env = {"0": 0, "w": w, "h": h, "2h": 2 * h, "2w": 2 * w, "w-h": w - h, "h-w": h - w}
    return env[expr]


def _ctrapezoid(t: int, w: int, h: int) -> np.ndarray:
    """Vertices of a CTRAPEZOID, counter-clockwise (the table lists them clockwise) from its first vertex."""
    pts = np.array([[_term(p.split()[0], w, h), _term(p.split()[1], w, h)] for p in _CTRAP[t]], np.int64)
    return np.concatenate([pts[:1], pts[:0:-1]])


def circle_vertex_count(radius_db: float, tolerance_db: float) -> int:
    """Vertices of the inscribed regular polygon whose sagitta ``r (1 - cos(pi/n))`` is at most the tolerance.

    ``n = ceil(pi / arccos(1 - t/r))``, at least 8 and at most :data:`MAX_CIRCLE_VERTICES`.
    """
    if radius_db <= tolerance_db:
        return 8
    n = math.ceil(math.pi / math.acos(1.0 - tolerance_db / radius_db))
    return int(min(max(n, 8), MAX_CIRCLE_VERTICES))


def _circle(r: int, tolerance_db: float) -> np.ndarray:
    n = circle_vertex_count(r, tolerance_db)
    ang = 2.0 * np.pi * np.arange(n) / n
    return np.rint(np.stack([r * np.cos(ang), r * np.sin(ang)], axis=1)).astype(np.int64)


def _path_outline(pts: np.ndarray, hw: int, ext0: int, ext1: int) -> np.ndarray | None:
    """Outline of a path: centre line with its ends extended by the extensions, half-width ``hw`` on both sides,
    mitred joins (limit 10 half-widths, then bevelled). None when it has no area."""
    import shapely

    keep = np.ones(pts.shape[0], bool)
    keep[1:] = np.any(pts[1:] != pts[:-1], axis=1)
    p = pts[keep].astype(np.float64)
    if hw <= 0 or p.shape[0] < 2:
        return None
    d0 = (p[1] - p[0]) / np.hypot(*(p[1] - p[0]))
    d1 = (p[-1] - p[-2]) / np.hypot(*(p[-1] - p[-2]))
    p[0] -= d0 * ext0
    p[-1] += d1 * ext1
    poly = shapely.buffer(shapely.linestrings(p), hw, cap_style="flat", join_style="mitre", mitre_limit=10.0)
    if poly.is_empty or poly.geom_type != "Polygon":
        return None
    ring = shapely.get_coordinates(shapely.orient_polygons(poly).exterior)[:-1]
    return np.rint(ring).astype(np.int64)


# ----------------------------------------------------------------------------------------------------------------
# Parser
# ----------------------------------------------------------------------------------------------------------------

class _Modal:
    """Modal variables (SEMI P39, chapter on modal variables): reset at the start of the file, of each CELL and of
    each name record; positions reset to 0, everything else to undefined (None)."""

    __slots__ = ("repetition", "placement_x", "placement_y", "placement_cell", "layer", "datatype", "textlayer",
                 "texttype", "text_x", "text_y", "text_string", "geometry_x", "geometry_y", "relative",
                 "geometry_w", "geometry_h", "polygon_points", "path_halfwidth", "path_points", "path_start_ext",
                 "path_end_ext", "ctrapezoid_type", "circle_radius", "property_name", "property_values")

    def __init__(self):
        self.reset()

    def reset(self):
        for name in self.__slots__:
            setattr(self, name, None)
        self.placement_x = self.placement_y = self.text_x = self.text_y = self.geometry_x = self.geometry_y = 0
        self.relative = False


class _CellBuild:
    """A cell as it is parsed: its geometry as chunks of expanded polygons (file order kept), its placements."""

    def __init__(self, key, offset):
        self.key = key
        self.offset = offset
        self.placements = []
        self.records = {}
        self.chunks = []
        self.loc = None  # (CBLOCK offset or None, offset of the CELL record) for parsing the cell again
        self.own_p = self.own_v = 0  # own polygons and vertices counted by the streamed read's survey
        self.children = {}  # child key -> (placements, first offset), by the survey

    def finish(self, name):
        chunks, self.chunks = self.chunks, []
        return OasisCell(name, chunks, [], dict(sorted(self.records.items())))


class _Pending:
    """A point list or an explicit repetition located in a region and decoded when the region is resolved.

    ``kind`` "g" (g-deltas, ``mode`` 4, or 5 for double deltas) or "u" (one integer per delta: ``mode`` 0/1
    alternating 1-deltas starting along x/y, 2 and 3 for 2- and 3-deltas, "x"/"y" for the spaces of repetition
    types 4-7); ``rows`` is the number of points (or positions) it gives; ``value`` is set on resolution: an
    (rows, 2) int64 array for a point list, a :class:`Repetition` for a repetition.
    """

    __slots__ = ("kind", "mode", "k0", "count", "n_local", "g0", "n_global", "grid", "rep_type", "implied", "rows",
                 "value", "at", "skip", "needed")


class _Region:
    """Point lists and explicit repetitions of one stretch of bytes (a CBLOCK, or a window of the file), located
    as they are parsed and decoded together."""

    def __init__(self, cur, pos: int, need: int):
        hi = min(cur.end, pos + max(_WINDOW, need))
        self.buf = cur.buf
        self.table = oc.VarintTable(cur.arr, pos, hi)
        self.at_end = hi == cur.end
        self.runs = []
        self.cur = cur

    def covers(self, cur, pos: int, need: int) -> bool:
        t = self.table
        return cur.buf is self.buf and t.lo <= pos and (pos + need <= t.hi or (self.at_end and cur.end == t.hi))


_WINDOW = 4 << 20
"""Bytes decoded together: a CBLOCK up to this size is one region; larger data is taken in windows of this size."""
_EXPAND_CHUNK = 1 << 21
"""Vertices expanded in one vectorised step (bounds the temporary index arrays)."""
_BIG_RUN = _WINDOW // 20
"""Runs longer than this (in values) are decoded at once, window by window, instead of with their region."""


_NAME_KINDS = {oc.CELLNAME: "CELLNAME", oc.CELLNAME_REF: "CELLNAME", oc.TEXTSTRING: "TEXTSTRING",
               oc.TEXTSTRING_REF: "TEXTSTRING", oc.PROPNAME: "PROPNAME", oc.PROPNAME_REF: "PROPNAME",
               oc.PROPSTRING: "PROPSTRING", oc.PROPSTRING_REF: "PROPSTRING", oc.XNAME: "XNAME",
               oc.XNAME_REF: "XNAME"}
_TABLES = ("CELLNAME", "TEXTSTRING", "PROPNAME", "PROPSTRING", "LAYERNAME", "XNAME")
_TABLE_RECORDS = {"CELLNAME": {3, 4}, "TEXTSTRING": {5, 6}, "PROPNAME": {7, 8}, "PROPSTRING": {9, 10},
                  "LAYERNAME": {11, 12}, "XNAME": {30, 31}}


class _Parser:
    def __init__(self, path, buf, *, keep, max_elements, max_vertices, max_memory_bytes, circle_tolerance_db,
                 mode: str = "whole"):
        self.mode = mode  # "whole"; or for the streamed read: "count", "geometry", "placements" (see _oasis_stream)
        self.block_at = None  # byte offset of the CBLOCK being parsed (None at the top level)
        self.target = None  # "placements" mode: the placement-cell keys wanted (None: all)
        self.release = None  # optional callback (start, stop): file bytes already read
        self.path = path
        self.buf = buf
        self.keep_fn = keep
        self.keep_cache = {}
        self.max_elements = max_elements
        self.max_vertices = max_vertices
        self.max_memory = max_memory_bytes
        self.circle_tol = circle_tolerance_db
        self.m = _Modal()
        self.cell = None
        self.cells = []
        self.cell_keys = set()
        self.names = {k: {} for k in ("CELLNAME", "TEXTSTRING", "PROPNAME", "PROPSTRING", "XNAME")}
        self.implicit = {k: None for k in self.names}  # None: unknown yet; int: next implicit number; False: explicit
        self.total_p = 0
        self.total_v = 0
        self.path_cache = (None, None, None)
        self.region = None
        self.entries = []
        self.big_runs = []
        self.run_bytes = 0
        self.unit = None
        self.fast_skip = 0  # POLYGON records left to the record-by-record parser before the fast path is tried again
        self.big_run, self.poly_bytes, self.vertex_bytes = _BIG_RUN, _POLY_BYTES, _VERTEX_BYTES
        self.tables = None
        self.validation = "none"
        self.handlers = {
            oc.XYABSOLUTE: self.xy_mode, oc.XYRELATIVE: self.xy_mode,
            oc.CELL_REF: self.cell_record, oc.CELL_NAMED: self.cell_record,
            oc.LAYERNAME_GEOMETRY: self.layername, oc.LAYERNAME_TEXT: self.layername,
            oc.PLACEMENT: self.placement, oc.PLACEMENT_MAG: self.placement, oc.TEXT: self.text,
            oc.RECTANGLE: self.rectangle, oc.POLYGON: self.polygon, oc.PATH: self.path_record,
            oc.TRAPEZOID_AB: self.trapezoid, oc.TRAPEZOID_A: self.trapezoid, oc.TRAPEZOID_B: self.trapezoid,
            oc.CTRAPEZOID: self.ctrapezoid, oc.CIRCLE: self.circle, oc.PROPERTY: self.property_record,
            oc.PROPERTY_REPEAT: self.property_repeat, oc.XELEMENT: self.xelement, oc.XGEOMETRY: self.xgeometry,
        }
        for rid in _NAME_KINDS:
            self.handlers[rid] = self.name_record

    def fail(self, msg):
        raise MaskReadError(f"{self.path}: OASIS: {msg}")

    # ------------------------------------------------------------------ file structure

    def run(self) -> OasisLayout:
        buf = self.buf
        if bytes(buf[:len(oc.MAGIC)]) != oc.MAGIC:
            self.fail("the file does not begin with the OASIS magic bytes '%SEMI-OASIS<CR><LF>'")
        cur = oc.Cursor(buf, self.path, len(oc.MAGIC))
        at = cur.pos
        if cur.uint() != oc.START:
            cur.fail("the first record is not START", at)
        self.start(cur, at)
        ended = self.records(cur, top=True)
        if not ended:
            cur.fail("truncated: the file ends without an END record")
        return self.finish() if self.mode == "whole" else None

    def records(self, cur, *, top: bool) -> bool:
        handlers = self.handlers
        while cur.pos < cur.end:
            at = cur.pos
            if cur.buf[at] == oc.PAD:  # PAD records: skip a run of zero bytes at once (zeros deflate best)
                _skip_zeros(cur)
                continue
            rid = cur.uint()
            h = handlers.get(rid)
            if h is not None:
                h(cur, at, rid)
            elif rid == oc.CBLOCK and top:
                self.cblock(cur, at)
            elif rid == oc.END and top:
                self.resolve()
                self.end(cur, at)
                return True
            elif rid in (oc.START, oc.END, oc.CBLOCK):
                cur.fail(f"{oc.RECORD_NAMES[rid]} record not allowed here", at)
            else:
                cur.fail(f"unknown record id {rid} (allowed: 0-34)", at)
        return False

    def start(self, cur, at):
        version = cur.string()
        if version != b"1.0":
            cur.fail(f"START version {version[:20]!r} (allowed: '1.0')", at)
        vat = cur.pos
        unit = cur.real()
        if not unit > 0:
            cur.fail(f"START unit {unit} (allowed: > 0 grid steps per micron)", vat)
        self.unit = unit
        flag = cur.uint()
        if flag > 1:
            cur.fail(f"START offset-flag {flag} (allowed: 0 or 1)", at)
        self.tables_in_end = flag == 1
        if not self.tables_in_end:
            self.tables = [(cur.uint(), cur.uint()) for _ in _TABLES]

    def end(self, cur, at):
        if self.tables_in_end:
            self.tables = [(cur.uint(), cur.uint()) for _ in _TABLES]
        cur.string()  # padding
        scheme = cur.uint()
        covered = cur.pos
        if scheme not in (0, 1, 2):
            cur.fail(f"END validation scheme {scheme} (allowed: 0 none, 1 CRC32, 2 checksum32)", covered - 1)
        if scheme:
            sig = int.from_bytes(cur.take(4), "little")
            got = _signature(self.buf, covered, scheme, self.release)
            name = "CRC32" if scheme == 1 else "checksum32"
            if got != sig:
                cur.fail(f"END validation {name} mismatch: file says {sig:08x}, bytes give {got:08x} (the file is "
                         "corrupt)", covered)
            self.validation = name.lower()
        if cur.pos - at != oc.END_RECORD_BYTES:
            cur.fail(f"END record is {cur.pos - at} bytes (must be {oc.END_RECORD_BYTES})", at)
        if cur.pos != len(self.buf):
            cur.fail(f"{len(self.buf) - cur.pos} bytes after the END record")
        self.end_at = at
        for kind, (_flag, offset) in zip(_TABLES, self.tables):
            if offset:
                self.check_table(cur, kind, offset)

    def check_table(self, cur, kind, offset):
        if offset >= self.end_at:
            cur.fail(f"{kind} table offset {offset} is not before the END record at byte {self.end_at}")
        probe = oc.Cursor(self.buf, self.path, offset, self.end_at)
        rid = probe.uint()
        if rid not in _TABLE_RECORDS[kind] | {oc.CBLOCK, oc.PAD}:
            cur.fail(f"{kind} table offset {offset} points to record id {rid}, not a {kind} record")

    def cblock(self, cur, at):
        out = self.inflate(cur, at)
        if self.release is not None:  # the streamed read's survey: the CBLOCK's file pages are not needed again
            self.release(at, cur.pos)
        self.resolve()
        inner = oc.Cursor(out, self.path, where=lambda p: f"byte {p} inside the CBLOCK at byte {at}")
        self.block_at = at
        self.records(inner, top=False)
        self.block_at = None
        self.resolve()

    def inflate(self, cur, at) -> bytes:
        """The inflated bytes of the CBLOCK whose id was read at ``at`` (cursor moved past it), sizes checked."""
        ctype = cur.uint()
        if ctype != 0:
            cur.fail(f"CBLOCK compression type {ctype} (allowed: 0, deflate)", at)
        n_out = cur.uint()
        n_in = cur.uint()
        if n_in > cur.end - cur.pos:
            cur.fail(f"truncated: CBLOCK of {n_in} compressed bytes, {cur.end - cur.pos} left", at)
        cap = min(self.max_memory, 1 << 31)
        if n_out > cap:
            cur.fail(f"CBLOCK declares {n_out} inflated bytes, more than the memory budget of {cap} bytes", at)
        if n_out > _DEFLATE_MAX_RATIO * n_in + 64:
            cur.fail(f"CBLOCK declares {n_out} inflated bytes from {n_in} compressed bytes, more than deflate can "
                     f"produce (at most {_DEFLATE_MAX_RATIO}:1)", at)
        view = memoryview(self.buf)[cur.pos:cur.pos + n_in]
        d = zlib.decompressobj(-15)
        try:
            out = d.decompress(view, n_out + 1)
        except zlib.error as exc:
            cur.fail(f"CBLOCK holds corrupt deflate data ({exc})", at)
        finally:
            view.release()
        if len(out) != n_out or not d.eof or d.unconsumed_tail:
            more = len(out) > n_out or d.unconsumed_tail
            cur.fail(f"CBLOCK declares {n_out} inflated bytes but its data inflates to "
                     f"{'more' if more else len(out)}{' (incomplete deflate stream)' if not more else ''}", at)
        cur.pos += n_in
        return out

    # ------------------------------------------------------------------ names and cells

    def name_record(self, cur, at, rid):
        self.cell = None
        self.m.reset()
        kind = _NAME_KINDS[rid]
        if kind == "XNAME":
            cur.uint()
        if kind == "CELLNAME":
            name = cur.nstring("cell name")
        else:
            name = cur.string()
        explicit = rid in (oc.CELLNAME_REF, oc.TEXTSTRING_REF, oc.PROPNAME_REF, oc.PROPSTRING_REF, oc.XNAME_REF)
        state = self.implicit[kind]
        if explicit:
            if state not in (None, False):
                cur.fail(f"{kind} with an explicit reference number after implicit ones (not allowed)", at)
            self.implicit[kind] = False
            ref = cur.uint()
        else:
            if state is False:
                cur.fail(f"{kind} with an implicit reference number after explicit ones (not allowed)", at)
            ref = state or 0
            self.implicit[kind] = ref + 1
        table = self.names[kind]
        if ref in table:
            cur.fail(f"{kind} reference number {ref} defined twice", at)
        table[ref] = name if kind == "CELLNAME" else True

    def layername(self, cur, at, rid):
        self.cell = None
        self.m.reset()
        cur.nstring("layer name")
        for _ in range(2):
            t = cur.uint()
            if t > 4:
                cur.fail(f"LAYERNAME interval type {t} (allowed: 0-4)", at)
            for _ in range((t > 0) + (t == 4)):
                cur.uint()

    def cell_record(self, cur, at, rid):
        key = ("ref", cur.uint()) if rid == oc.CELL_REF else ("name", cur.nstring("cell name"))
        if key in self.cell_keys:
            cur.fail(f"cell {key[1]!r} defined twice", at)
        self.cell_keys.add(key)
        self.cell = _CellBuild(key, at)
        self.cells.append(self.cell)
        self.cell.loc = (self.block_at, at)
        self.m.reset()

    def in_cell(self, cur, at, rid):
        if self.cell is None:
            cur.fail(f"{oc.RECORD_NAMES[rid]} record outside a CELL", at)
        c = self.cell
        kind = oc.RECORD_NAMES[rid].lower()
        c.records[kind] = c.records.get(kind, 0) + 1
        return c

    def xy_mode(self, cur, at, rid):
        self.m.relative = rid == oc.XYRELATIVE

    # ------------------------------------------------------------------ shared fields

    def need(self, cur, at, value, name, rid):
        if value is None:
            cur.fail(f"{oc.RECORD_NAMES[rid]} uses the modal variable {name} before it is set", at)
        return value

    def layer_datatype(self, cur, info, lbit=1, dbit=2):
        if info & lbit:
            self.m.layer = cur.uint()
        if info & dbit:
            self.m.datatype = cur.uint()

    def position(self, cur, info, xbit, ybit, which):
        m = self.m
        x, y = getattr(m, which + "_x"), getattr(m, which + "_y")
        if info & xbit:
            v = cur.coord("x")
            x = x + v if m.relative else v
        if info & ybit:
            v = cur.coord("y")
            y = y + v if m.relative else v
        if abs(x) > oc.COORD_LIMIT or abs(y) > oc.COORD_LIMIT:
            cur.fail("relative position accumulates beyond +-2**52 database units")
        setattr(m, which + "_x", x)
        setattr(m, which + "_y", y)
        return x, y

    def repetition(self, cur, at, info, rbit, rid):
        if not info & rbit:
            return None
        rep = self.read_repetition(cur)
        if rep is oc.REUSE:
            rep = self.need(cur, at, self.m.repetition, "repetition", rid)
        self.m.repetition = rep
        return rep

    # ------------------------------------------------------------------ deferred runs of integers

    def locate(self, cur, kind: str, mode, count: int, what: str, at: int) -> _Pending:
        """Locate a run of ``count`` deltas at the cursor, move past it, and queue it for decoding."""
        pos = cur.pos
        if count > cur.end - pos:
            cur.fail(f"{what}: {count} values declared, only {cur.end - pos} bytes left", at)
        self.run_bytes += 16 * (count + 2)  # the decoded points or positions stay in memory: count them
        self.admit(cur, at, 0, 0, what)
        r = _Pending()
        r.kind, r.mode, r.count, r.at, r.grid, r.rep_type, r.implied, r.value = kind, mode, count, at, 1, None, 0, None
        r.skip = r.needed = False  # the streamed read's placement pass decodes only what it hands out
        if count > _BIG_RUN:  # decoded now, window by window (the caller sets grid and implied before use)
            self.big_runs.append((cur, pos, r, what))
            cur.pos = self.skip_run(cur, pos, r, what)
            return r
        need = (20 if kind == "g" else 10) * count + 16
        if self.region is None or not self.region.covers(cur, pos, need):
            self.resolve()
            self.region = _Region(cur, pos, need)
        t = self.region.table
        if kind == "g":
            r.k0, r.n_local, r.g0, r.n_global, cur.pos = t.g_span(cur, pos, count, what)
        else:
            r.k0, cur.pos = t.u_span(cur, pos, count, what)
        self.region.runs.append(r)
        return r

    def skip_run(self, cur, pos: int, r: _Pending, what: str) -> int:
        """Decode a long run window by window (bounded memory); keep its deltas on the run; return its end."""
        d = np.empty((r.count, 2), np.int64)
        done = 0
        while done < r.count:
            t = oc.VarintTable(cur.arr, pos, min(cur.end, pos + max(_WINDOW, 64)))
            part = _Pending()
            part.kind, part.count, part.at = r.kind, 0, r.at
            part.mode = (r.mode + done) & 1 if r.kind == "u" and r.mode in (0, 1) else r.mode
            m = min(r.count - done, t.g_complete(0) if r.kind == "g" else t.n)
            if m == 0:
                cur.fail(f"truncated or malformed {what}: {r.count} values expected", r.at)
            part.count = m
            if r.kind == "g":
                part.k0, part.n_local, part.g0, part.n_global, pos = t.g_span(cur, pos, m, what)
            else:
                part.k0, pos = t.u_span(cur, pos, m, what)
            d[done:done + m] = _raw_deltas(t, [part], cur)
            done += m
        r.value = d  # raw deltas until the record has set grid and implied; see finish_big_runs
        return pos

    def finish_big_runs(self):
        runs, self.big_runs = self.big_runs, []
        for cur, _, r, _ in runs:  # long runs (each at least _BIG_RUN values): one at a time
            d, r.value = r.value, None
            _finish_runs([r], d, cur)

    def read_point_list(self, cur, *, polygon: bool):
        """A point list, located now and decoded with its region (or at once when it is empty)."""
        at = cur.pos
        t = cur.uint()
        n = cur.uint()
        if t > 5:
            cur.fail(f"point list of unknown type {t} (allowed: 0-5)", at)
        if n == 0:
            return np.zeros((1, 2), np.int64)
        r = self.locate(cur, "g" if t >= 4 else "u", t, n, f"point list of type {t}", at)
        r.implied = 1 if polygon and t <= 1 else 0
        r.rows = n + 1 + r.implied
        return r

    def read_repetition(self, cur):
        """A repetition: lattices at once, explicit offsets located now and decoded with their region."""
        at = cur.pos
        t = cur.uint()
        if t not in (4, 5, 6, 7, 10, 11):
            cur.pos = at
            return cur.repetition()
        n = cur.uint() + 2
        grid = cur.length("grid") if t in (5, 7, 11) else 1
        r = self.locate(cur, "g" if t >= 10 else "u", "x" if t in (4, 5) else "y" if t in (6, 7) else 4, n - 1,
                        f"repetition of type {t}", at)
        r.grid, r.rep_type, r.rows = grid, t, n
        return r

    def resolve(self):
        """Decode the queued runs of the current region, then expand the queued geometry into polygons."""
        self.finish_big_runs()
        region, self.region = self.region, None
        if region is not None and self.mode in ("placements", "geometry"):  # runs nobody asked for, unless modal
            modal = (self.m.repetition, self.m.polygon_points)
            region.runs = [r for r in region.runs if not r.skip or r is modal[0] or r is modal[1]]
        if region is not None and region.runs:
            _decode_runs(region)
        if self.mode != "whole":  # the streamed read expands the queued records itself, a bounded piece at a time
            return
        entries, self.entries = self.entries, []
        if entries:
            _expand(entries)

    def keep(self, cur, at, layer, datatype):
        key = (layer, datatype)
        k = self.keep_cache.get(key)
        if k is None:
            if layer > 2 ** 31 - 1 or datatype > 2 ** 31 - 1:
                cur.fail(f"layer/datatype {layer}/{datatype} beyond 2**31-1 (not supported)", at)
            k = self.keep_cache[key] = bool(self.keep_fn(np.array([layer]), np.array([datatype]))[0])
        return k

    def admit(self, cur, at, n_poly: int, n_vert: int, kind: str):
        """Count a record's polygons and vertices before they exist."""
        self.total_p += n_poly
        self.total_v += n_vert
        if self.total_p > self.max_elements:
            cur.fail(f"{kind} record: {n_poly} polygons bring the total to {self.total_p}, more than the limit "
                     f"max_elements={self.max_elements}", at)
        if self.total_v > self.max_vertices:
            cur.fail(f"{kind} record: {n_vert} vertices bring the total to {self.total_v}, more than the limit "
                     f"max_vertices={self.max_vertices}", at)
        need = self.total_p * _POLY_BYTES + self.total_v * _VERTEX_BYTES + self.run_bytes
        if need > self.max_memory and self.mode == "whole":  # the streamed read holds a bounded piece at a time
            cur.fail(f"{kind}: {self.total_p} polygons with {self.total_v} vertices and {self.run_bytes // 16} "
                     f"decoded points and positions need about {need / 1e6:.0f} MB, more than the memory budget of "
                     f"{self.max_memory / 1e6:.0f} MB", at)

    def add(self, cur, at, rid, pts, x, y, rep):
        """Queue one geometry record: base vertices ``pts`` ((V, 2) array or a located point list) relative to
        (x, y), optional repetition; its polygons and vertices are counted now, made on resolution."""
        m = self.m
        lay = self.need(cur, at, m.layer, "layer", rid)
        dt = self.need(cur, at, m.datatype, "datatype", rid)
        if self.mode == "placements":  # geometry is not wanted: its runs need not be decoded
            _skip_pending(pts, rep)
            return
        if pts is None or not self.keep(cur, at, lay, dt):
            return
        n = _positions(rep)
        nv = pts.rows if isinstance(pts, _Pending) else pts.shape[0]
        if self.mode != "geometry":  # counted once, by the whole read or the streamed read's survey
            self.admit(cur, at, n, n * nv, oc.RECORD_NAMES[rid])
        _need_pending(pts, rep)
        if self.mode == "count":
            self.cell.own_p += n
            self.cell.own_v += n * nv
            return
        self.entries.append((self.cell, lay, dt, pts, x, y, rep))

    # ------------------------------------------------------------------ element records

    def placement(self, cur, at, rid):
        c = self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        if info & 0x80:
            m.placement_cell = ("ref", cur.uint()) if info & 0x40 else ("name", cur.nstring("cell name"))
        child = self.need(cur, at, m.placement_cell, "placement-cell", rid)
        mag, angle = 1.0, 90.0 * ((info >> 1) & 3)
        if rid == oc.PLACEMENT_MAG:
            angle = 0.0
            if info & 0x04:
                mag = cur.real()
            if info & 0x02:
                angle = cur.real()
            if not (0.0 < mag <= 1e6) or abs(angle) > 1e9:
                cur.fail(f"PLACEMENT magnification {mag} / angle {angle} (allowed: 0 < magnification <= 1e6, "
                         "finite angle)", at)
        x, y = self.position(cur, info, 0x20, 0x10, "placement")
        rep = self.repetition(cur, at, info, 0x08, rid)
        q = angle % 360.0
        if q in (0.0, 90.0, 180.0, 270.0):  # exact for the right angles: integer placements stay exact
            cs, sn = ((1.0, 0.0), (0.0, 1.0), (-1.0, 0.0), (0.0, -1.0))[int(q) // 90]
        else:
            cs, sn = math.cos(math.radians(angle)), math.sin(math.radians(angle))
        fy = -1.0 if info & 1 else 1.0
        if self.mode == "count":  # the survey keeps counts per child only; the streamed read parses them again
            n, first = c.children.get(child, (0, at))
            c.children[child] = (n + _positions(rep), first)
            return
        if self.mode == "geometry" or (self.target is not None and child not in self.target):
            _skip_pending(rep)  # placements not handed out: their repetitions are not decoded
            return
        _need_pending(rep)  # handed out (perhaps reused from a record that was not): decoded
        c.placements.append((child, x, y, (cs * mag, -sn * mag * fy, sn * mag, cs * mag * fy), rep, at))

    def text(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        if info & 0x40:
            m.text_string = cur.uint() if info & 0x20 else cur.string()
        self.need(cur, at, m.text_string, "text-string", rid)
        if info & 0x01:
            m.textlayer = cur.uint()
        if info & 0x02:
            m.texttype = cur.uint()
        self.need(cur, at, m.textlayer, "textlayer", rid)
        self.need(cur, at, m.texttype, "texttype", rid)
        self.position(cur, info, 0x10, 0x08, "text")
        self.repetition(cur, at, info, 0x04, rid)

    def rectangle(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        self.layer_datatype(cur, info)
        square = info & 0x80
        if info & 0x40:
            m.geometry_w = cur.length("width")
        if info & 0x20:
            if square:
                cur.fail("RECTANGLE with both S (square) and H (height) set", at)
            m.geometry_h = cur.length("height")
        w = self.need(cur, at, m.geometry_w, "geometry-w", rid)
        if square:
            m.geometry_h = w
        h = self.need(cur, at, m.geometry_h, "geometry-h", rid)
        x, y = self.position(cur, info, 0x10, 0x08, "geometry")
        rep = self.repetition(cur, at, info, 0x04, rid)
        self.add(cur, at, rid, _rect(w, h), x, y, rep)

    def fast_polygons(self, cur, at) -> bool:
        """Parse a run of plain POLYGON records from ``at`` at once (:mod:`metalay.io._oasis_batch`); False when
        the record at ``at`` is not one (it is then parsed record by record, as are a few after it)."""
        if self.cell is None:
            return False
        reg = self.region
        if reg is None or not reg.covers(cur, at, 64) or (at != reg.table.lo and cur.arr[at - 1] >= 128):
            self.resolve()  # no table here, or ``at`` is not after a whole integer of it
            self.region = _Region(cur, at, 0)
        n, end = ob.parse_run(self, cur, at, self.region.table)
        if n < 4:
            self.fast_skip = 16 if n else 64  # short or no run here: back off (a file of other records)
        if n == 0:
            return False
        cur.pos = end
        return True

    def polygon(self, cur, at, rid):
        if self.fast_skip > 0:
            self.fast_skip -= 1
        elif self.fast_polygons(cur, at):
            return
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        self.layer_datatype(cur, info)
        if info & 0x20:
            pat = cur.pos
            pts = self.read_point_list(cur, polygon=True)
            if (pts.rows if isinstance(pts, _Pending) else pts.shape[0]) < 3:
                cur.fail("POLYGON point list gives fewer than 3 vertices", pat)
            m.polygon_points = pts
        pts = self.need(cur, at, m.polygon_points, "polygon-point-list", rid)
        x, y = self.position(cur, info, 0x10, 0x08, "geometry")
        rep = self.repetition(cur, at, info, 0x04, rid)
        self.add(cur, at, rid, pts, x, y, rep)

    def path_record(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        self.layer_datatype(cur, info)
        if info & 0x40:
            m.path_halfwidth = cur.length("half-width")
        if info & 0x80:
            scheme = cur.uint()
            if scheme > 15:
                cur.fail(f"PATH extension scheme {scheme} (allowed: 0-15)", at)
            for shift, attr in ((2, "path_start_ext"), (0, "path_end_ext")):
                s = (scheme >> shift) & 3
                if s == 1:
                    setattr(m, attr, 0)
                elif s == 2:
                    setattr(m, attr, self.need(cur, at, m.path_halfwidth, "path-halfwidth", rid))
                elif s == 3:
                    setattr(m, attr, cur.coord("path extension"))
        if info & 0x20:
            m.path_points = cur.point_list(polygon=False)
            if m.path_points.shape[0] < 2:
                cur.fail("PATH point list with fewer than 2 points", at)
        hw = self.need(cur, at, m.path_halfwidth, "path-halfwidth", rid)
        pts = self.need(cur, at, m.path_points, "path-point-list", rid)
        e0 = self.need(cur, at, m.path_start_ext, "path-start-extension", rid)
        e1 = self.need(cur, at, m.path_end_ext, "path-end-extension", rid)
        x, y = self.position(cur, info, 0x10, 0x08, "geometry")
        rep = self.repetition(cur, at, info, 0x04, rid)
        cached = self.path_cache
        if cached[0] is pts and cached[1] == (hw, e0, e1):  # modal reuse of the same path: outline once
            outline = cached[2]
        else:
            lay, dt = self.need(cur, at, m.layer, "layer", rid), self.need(cur, at, m.datatype, "datatype", rid)
            if not self.keep(cur, at, lay, dt):
                return
            # an outline has at least as many vertices as the centre line: refuse before the work when over
            if self.total_v + _positions(rep) * pts.shape[0] > self.max_vertices:
                cur.fail(f"PATH record: its outline brings the vertex total over the limit max_vertices="
                         f"{self.max_vertices}", at)
            outline = _path_outline(pts, hw, e0, e1)
            self.path_cache = (pts, (hw, e0, e1), outline)
        self.add(cur, at, rid, outline, x, y, rep)

    def trapezoid(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        self.layer_datatype(cur, info)
        if info & 0x40:
            m.geometry_w = cur.length("width")
        if info & 0x20:
            m.geometry_h = cur.length("height")
        da = cur.coord("delta-a") if rid in (oc.TRAPEZOID_AB, oc.TRAPEZOID_A) else 0
        db = cur.coord("delta-b") if rid in (oc.TRAPEZOID_AB, oc.TRAPEZOID_B) else 0
        w = self.need(cur, at, m.geometry_w, "geometry-w", rid)
        h = self.need(cur, at, m.geometry_h, "geometry-h", rid)
        vertical = bool(info & 0x80)
        span = h if vertical else w
        if max(0, da) + max(0, -db) > span or max(0, -da) + max(0, db) > span:
            cur.fail(f"TRAPEZOID deltas {da}, {db} do not fit its {'height' if vertical else 'width'} {span}", at)
        x, y = self.position(cur, info, 0x10, 0x08, "geometry")
        rep = self.repetition(cur, at, info, 0x04, rid)
        self.add(cur, at, rid, _dedup(_trapezoid(w, h, da, db, vertical)), x, y, rep)

    def ctrapezoid(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        self.layer_datatype(cur, info)
        if info & 0x80:
            t = cur.uint()
            if t > 25:
                cur.fail(f"CTRAPEZOID type {t} (allowed: 0-25)", at)
            m.ctrapezoid_type = t
        if info & 0x40:
            m.geometry_w = cur.length("width")
        if info & 0x20:
            m.geometry_h = cur.length("height")
        t = self.need(cur, at, m.ctrapezoid_type, "ctrapezoid-type", rid)
        if t in (16, 17, 18, 19, 22, 23, 25):
            w = self.need(cur, at, m.geometry_w, "geometry-w", rid)
            h = w if t not in (22, 23) else 2 * w
        elif t in (20, 21):
            h = self.need(cur, at, m.geometry_h, "geometry-h", rid)
            w = 2 * h
        else:
            w = self.need(cur, at, m.geometry_w, "geometry-w", rid)
            h = self.need(cur, at, m.geometry_h, "geometry-h", rid)
        m.geometry_w, m.geometry_h = w, h
        if (t <= 7 and (w < h or (t in (4, 5, 6, 7) and w < 2 * h))) or (
                8 <= t <= 15 and (h < w or (t >= 12 and h < 2 * w))):
            cur.fail(f"CTRAPEZOID type {t} with width {w} and height {h} is not a valid shape", at)
        x, y = self.position(cur, info, 0x10, 0x08, "geometry")
        rep = self.repetition(cur, at, info, 0x04, rid)
        self.add(cur, at, rid, _dedup(_ctrapezoid(t, w, h)), x, y, rep)

    def circle(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        m = self.m
        info = cur.byte()
        self.layer_datatype(cur, info)
        if info & 0x20:
            m.circle_radius = cur.length("radius")
        r = self.need(cur, at, m.circle_radius, "circle-radius", rid)
        x, y = self.position(cur, info, 0x10, 0x08, "geometry")
        rep = self.repetition(cur, at, info, 0x04, rid)
        lay, dt = self.need(cur, at, m.layer, "layer", rid), self.need(cur, at, m.datatype, "datatype", rid)
        if r == 0 or not self.keep(cur, at, lay, dt):
            return
        self.add(cur, at, rid, _circle(r, self.circle_tol), x, y, rep)

    def xgeometry(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        info = cur.byte()
        cur.uint()
        self.layer_datatype(cur, info)
        cur.string()
        self.position(cur, info, 0x10, 0x08, "geometry")
        self.repetition(cur, at, info, 0x04, rid)

    def xelement(self, cur, at, rid):
        self.in_cell(cur, at, rid)
        cur.uint()
        cur.string()

    def property_record(self, cur, at, rid):
        m = self.m
        info = cur.byte()
        if info & 0x04:
            m.property_name = cur.uint() if info & 0x02 else cur.string()
        self.need(cur, at, m.property_name, "last-property-name", rid)
        n = info >> 4
        if info & 0x08:
            if n:
                cur.fail("PROPERTY reuses the last value list but also declares values", at)
            self.need(cur, at, m.property_values, "last-value-list", rid)
            return
        if n == 15:
            n = cur.uint()
            if n > cur.end - cur.pos:
                cur.fail(f"PROPERTY declares {n} values, only {cur.end - cur.pos} bytes left", at)
        for _ in range(n):  # property values (bounded by the bytes left)
            t = cur.uint()
            if t <= 7:
                cur.real_body(t, at)
            elif t in (8, 9, 13, 14, 15):
                cur.uint()
            elif t in (10, 11, 12):
                cur.string()
            else:
                cur.fail(f"property value of unknown type {t} (allowed: 0-15)", at)
        m.property_values = n

    def property_repeat(self, cur, at, rid):
        self.need(cur, at, self.m.property_name, "last-property-name", rid)

    # ------------------------------------------------------------------ resolution

    def finish(self) -> OasisLayout:
        names = self.names["CELLNAME"]
        path = self.path

        def resolve(key, offset):
            if key[0] == "name":
                return key[1]
            if key[1] not in names:
                raise MaskReadError(f"{path}: OASIS byte {offset}: cell reference number {key[1]} has no CELLNAME "
                                    "record")
            return names[key[1]]

        cells: dict[str, OasisCell] = {}
        for b in self.cells:
            name = resolve(b.key, b.offset)
            if name in cells:
                raise MaskReadError(f"{path}: OASIS byte {b.offset}: cell {name!r} defined twice")
            cell = b.finish(name)
            for child, x, y, lin, rep, off in b.placements:
                rep = rep.value if isinstance(rep, _Pending) else rep
                cell.placements.append(Placement(resolve(child, off), x, y, lin, rep, off))
            cells[name] = cell
        self.cells = []
        # 1e-6 / unit to 15 significant digits: a grid of 1000 steps per micron is exactly 1e-9 m, not 9.99...e-10
        return OasisLayout(path, float(f"{1e-6 / self.unit:.15g}"), 1e-6, cells, self.validation)


def _skip_zeros(cur) -> None:
    """Move the cursor past a run of zero bytes (PAD records), looking at 64 KB at a time."""
    while cur.pos < cur.end:
        chunk = cur.arr[cur.pos:min(cur.end, cur.pos + (1 << 16))]
        nz = np.flatnonzero(chunk)
        if nz.size:
            cur.pos += int(nz[0])
            return
        cur.pos += chunk.shape[0]


def _skip_pending(*runs) -> None:
    """Mark located runs as not wanted (the streamed read's placement pass decodes only what it hands out)."""
    for r in runs:
        if isinstance(r, _Pending) and r.value is None and not r.needed:
            r.skip = True


def _need_pending(*runs) -> None:
    """Mark located runs as used by a record that is handed out (decoded even if also marked not wanted)."""
    for r in runs:
        if isinstance(r, _Pending):
            r.skip, r.needed = False, True


def _positions(rep) -> int:
    """Number of positions of a repetition (1 without one), known before it is decoded."""
    if rep is None:
        return 1
    return rep.rows if isinstance(rep, _Pending) else rep.count


def _seg_cumsum(d: np.ndarray, counts: np.ndarray, fail) -> np.ndarray:
    """Cumulative sums of consecutive runs of deltas (``counts`` rows each, all > 0), each run from zero.

    A float pass checks first that no partial sum leaves +-COORD_LIMIT (``fail(run_index)`` otherwise), so the
    exact int64 pass cannot overflow. Each run's start row gets the previous run's total subtracted, so one global
    cumsum restarts at every run without ever holding a sum across runs.
    """
    starts = np.cumsum(counts) - counts
    df = d.astype(np.float64)
    tf = np.add.reduceat(df, starts, axis=0)
    df[starts[1:]] -= tf[:-1]
    cf = np.abs(np.cumsum(df, axis=0)).max(axis=1)
    if cf.max(initial=0.0) > oc.COORD_LIMIT:
        fail(int(np.searchsorted(starts, int(np.argmax(cf > oc.COORD_LIMIT)), side="right")) - 1)
    tot = np.add.reduceat(d, starts, axis=0)
    d2 = d.copy()
    d2[starts[1:]] -= tot[:-1]
    return np.cumsum(d2, axis=0)


def _decode_runs(region: _Region) -> None:
    """Decode every located run of a region at once and set each run's ``value``."""
    _finish_runs(region.runs, _raw_deltas(region.table, region.runs, region.cur), region.cur)


def _raw_deltas(t, runs, cur) -> np.ndarray:
    """The deltas of located runs, back to back (before a grid factor and the sums), vectorised over runs."""
    counts = np.array([r.count for r in runs], np.int64)
    is_g = np.array([r.kind == "g" for r in runs])
    d = np.empty((int(counts.sum()), 2), np.int64)
    row0 = np.cumsum(counts) - counts

    def rows_of(sel):
        return (np.repeat(row0[sel] - (np.cumsum(counts[sel]) - counts[sel]), counts[sel])
                + np.arange(int(counts[sel].sum())))

    if is_g.any():
        g = [r for r in runs if r.kind == "g"]
        d[rows_of(is_g)] = t.gdeltas(np.array([r.k0 for r in g]), np.array([r.n_local for r in g]),
                                     np.array([r.g0 for r in g]), np.array([r.n_global for r in g]))
    if not is_g.all():
        u = [r for r in runs if r.kind == "u"]
        cu = counts[~is_g]
        v = t.values(np.array([r.k0 for r in u]), cu)
        mode = np.repeat(np.array([{0: 0, 1: 1, 2: 2, 3: 3, "x": 4, "y": 5}[r.mode] for r in u]), cu)
        j = np.arange(v.shape[0]) - np.repeat(np.cumsum(cu) - cu, cu)
        du = np.zeros((v.shape[0], 2), np.int64)
        alt = mode <= 1  # 1-deltas: a signed integer along x then y then x ... (or starting along y)
        mag = (v >> np.uint64(1)).astype(np.int64)
        sv = np.where((v & np.uint64(1)) != 0, -mag, mag)
        axis = (j + mode) & 1
        du[alt & (axis == 0), 0] = sv[alt & (axis == 0)]
        du[alt & (axis == 1), 1] = sv[alt & (axis == 1)]
        for m, bits in ((2, 2), (3, 3)):  # 2-deltas and 3-deltas: direction in the low bits
            sel = mode == m
            if sel.any():
                w = v[sel]
                dirn = (w & np.uint64((1 << bits) - 1)).astype(np.int64)
                mg = (w >> np.uint64(bits)).astype(np.int64)
                du[sel, 0], du[sel, 1] = oc._DIR8_X[dirn] * mg, oc._DIR8_Y[dirn] * mg
        big = (v > np.uint64(oc.COORD_LIMIT)) & (mode >= 4)
        if big.any():
            k = int(np.searchsorted(np.cumsum(cu), int(np.argmax(big)), side="right"))
            cur.fail("repetition space beyond 2**52 database units", u[k].at)
        du[mode == 4, 0] = v[mode == 4].astype(np.int64)
        du[mode == 5, 1] = v[mode == 5].astype(np.int64)
        d[rows_of(~is_g)] = du
    return d


def _finish_runs(runs, d, cur) -> None:
    """Grid factors, double deltas and checked sums of the deltas ``d`` of ``runs``; sets each run's ``value``."""
    counts = np.array([r.count for r in runs], np.int64)
    grid = np.array([r.grid for r in runs], np.int64)
    if (grid != 1).any():
        gr = np.repeat(grid, counts)
        over = np.abs(d).max(axis=1).astype(np.float64) * gr > oc.COORD_LIMIT
        if over.any():
            k = int(np.searchsorted(np.cumsum(counts), int(np.argmax(over)), side="right"))
            cur.fail("repetition reaches beyond 2**52 database units", runs[k].at)
        d *= gr[:, None]

    def fail(k):
        cur.fail(f"{'repetition' if runs[k].rep_type else 'point list'} reaches beyond +-2**52 database units",
                 runs[k].at)

    double = np.array([r.kind == "g" and r.mode == 5 for r in runs])
    if double.any():  # type 5: the deltas are differences of the displacements
        dd = np.repeat(double, counts)
        d[dd] = _seg_cumsum(d[dd], counts[double], lambda k: fail(int(np.flatnonzero(double)[k])))
    pos = _seg_cumsum(d, counts, fail)
    ends = np.cumsum(counts)
    for k, r in enumerate(runs):  # one small view per run (runs are records, not sites)
        pts = np.empty((r.count + 1 + r.implied, 2), np.int64)
        pts[0] = 0
        pts[1:r.count + 1] = pos[ends[k] - r.count:ends[k]]
        if r.implied:  # the implied vertex brings the coordinate of the next (missing) delta back to zero
            pts[-1] = pts[-2]
            pts[-1, (r.count + r.mode) & 1] = 0
        r.value = oc.Repetition(r.rep_type, explicit=pts) if r.rep_type else pts


def _expand(entries) -> None:
    """Expand queued geometry into polygons, appended to each cell's chunks in file order."""
    for cell, piece in _iter_expand(entries):
        cell.chunks.append(piece)


def _iter_expand(entries):
    """Yield (cell, (layer, datatype, counts, xy)) pieces of queued geometry in file order, vectorised over the
    records of a batch (bounded by :data:`_EXPAND_CHUNK` vertices at a time; a record with many positions is
    expanded a slice of positions at a time, never all at once)."""
    batch, size = [], 0
    for e in entries + [None]:  # records, not sites
        if e is not None and isinstance(e[1], ob.Batch):  # a run parsed at once: expanded on its own
            if batch:
                yield batch[0][0], _expand_batch(batch)
                batch, size = [], 0
            for piece in ob.expand(e[1], _EXPAND_CHUNK):
                yield e[0], piece
            continue
        if e is not None:
            pts = e[3].value if isinstance(e[3], _Pending) else e[3]
            rep = e[6].value if isinstance(e[6], _Pending) else e[6]
            n = 1 if rep is None else rep.count
            nv = n * pts.shape[0]
        if batch and (e is None or e[0] is not batch[0][0] or size + nv > _EXPAND_CHUNK):
            yield batch[0][0], _expand_batch(batch)
            batch, size = [], 0
        if e is None:
            break
        if nv > _EXPAND_CHUNK:
            for piece in _expand_large(e[1], e[2], pts, e[4], e[5], rep):
                yield e[0], piece
            continue
        batch.append((e[0], e[1], e[2], pts, e[4], e[5], rep, n))
        size += nv


def _expand_large(lay, dt, pts, x, y, rep):
    """One record with many positions, expanded in slices of positions (yields the pieces)."""
    base = pts + np.array([x, y], np.int64)
    step = max(1, _EXPAND_CHUNK // base.shape[0])
    n = 1 if rep is None else rep.count
    for lo in range(0, n, step):
        o = np.zeros((1, 2), np.int64) if rep is None else rep_offsets(rep, lo, min(n, lo + step))
        m = o.shape[0]
        yield (np.full(m, lay, np.int32), np.full(m, dt, np.int32), np.full(m, base.shape[0], np.int64),
               (base[None, :, :] + o[:, None, :]).reshape(-1, 2))


def rep_offsets(rep, lo: int, hi: int) -> np.ndarray:
    """Positions ``lo:hi`` of a repetition, equal to ``rep.offsets()[lo:hi]`` without making the others."""
    if rep.explicit is not None:
        return rep.explicit[lo:hi]
    k = np.arange(lo, hi, dtype=np.int64)
    i, j = k % rep.nx, k // rep.nx
    out = np.empty((hi - lo, 2), np.int64)
    out[:, 0] = j * rep.b[0] + i * rep.a[0]
    out[:, 1] = j * rep.b[1] + i * rep.a[1]
    return out


def _expand_batch(batch) -> tuple:
    """Records of one cell: vertex (e, i, v) = pts_e[v] + offset_e[i] + (x_e, y_e), gathered in one pass."""
    nv = np.array([b[3].shape[0] for b in batch], np.int64)
    n = np.array([b[7] for b in batch], np.int64)
    pool_p = np.concatenate([b[3] for b in batch])
    zero = np.zeros((1, 2), np.int64)
    pool_o = np.concatenate([zero if b[6] is None else b[6].offsets() for b in batch])
    xy = np.array([(b[4], b[5]) for b in batch], np.int64)
    ps = np.cumsum(nv) - nv
    ent = np.repeat(np.arange(len(batch)), n)  # pool_o has one row per polygon, in order
    vp = nv[ent]
    lay = np.array([b[1] for b in batch], np.int32)[ent]
    dt = np.array([b[2] for b in batch], np.int32)[ent]
    if (nv == nv[0]).all():  # one vertex count (the common case): gather per polygon, broadcast over vertices
        shift = pool_o + xy[ent]  # the offsets are already one row per polygon, in order
        out = pool_p.reshape(len(batch), int(nv[0]), 2)[ent]
        np.add(out, shift[:, None, :], out=out)
        return lay, dt, vp, out.reshape(-1, 2)
    poly = np.repeat(np.arange(ent.shape[0]), vp)
    v = np.arange(poly.shape[0]) - np.repeat(np.cumsum(vp) - vp, vp)
    ev = ent[poly]
    out = pool_p[ps[ev] + v] + pool_o[poly] + xy[ev]
    return lay, dt, vp, out


def _dedup(pts: np.ndarray) -> np.ndarray | None:
    """Drop repeated consecutive vertices (a degenerate trapezoid side); None when fewer than 3 remain."""
    keep = np.any(pts != np.roll(pts, 1, axis=0), axis=1)
    out = pts[keep]
    return out if out.shape[0] >= 3 else None


def _signature(buf, covered: int, scheme: int, release=None) -> int:
    """CRC32 (scheme 1) or checksum32 (scheme 2) of ``buf[:covered]``, 16 MB at a time; ``release(lo, hi)`` is
    called after each piece when given (the streamed read's survey: the file pages are not needed again)."""
    got = 0
    with memoryview(buf) as mv:
        for lo in range(0, covered, 1 << 24):
            hi = min(covered, lo + (1 << 24))
            with mv[lo:hi] as part:
                if scheme == 1:
                    got = zlib.crc32(part, got)
                else:  # a uint64 sum of 16 MB cannot overflow
                    got += int(np.frombuffer(part, np.uint8).sum(dtype=np.uint64))
            if release is not None:
                release(lo, hi)
    return got & 0xFFFFFFFF


# ----------------------------------------------------------------------------------------------------------------
# Entry points
# ----------------------------------------------------------------------------------------------------------------

def _layer_filter(layers):
    if layers is None:
        return lambda lay, dt: np.ones(np.shape(lay)[0], bool)
    pairs = {(int(i[0]), int(i[1])) for i in layers if isinstance(i, (tuple, list))}
    whole = {int(i) for i in layers if not isinstance(i, (tuple, list))}
    return lambda lay, dt: np.array([(int(a) in whole) or ((int(a), int(b)) in pairs) for a, b in zip(lay, dt)])


def parse_oasis(path, *, layers=None, layer_filter=None, max_elements: int = _DEFAULT_MAX_ELEMENTS,
                max_vertices: int = _DEFAULT_MAX_VERTICES, max_memory_bytes: int | None = None,
                circle_tolerance_db: float = DEFAULT_CIRCLE_TOLERANCE_DB) -> OasisLayout:
    """Parse an OASIS file into cells (own geometry expanded, placements not).

    Parameters
    ----------
    path : str or os.PathLike
        The OASIS file.
    layers : iterable of int or (int, int), optional
        Keep only these layers (an int keeps every datatype of that layer). Default: all.
    layer_filter : callable, optional
        ``f(layer_array, datatype_array) -> bool array``; overrides ``layers``.
    max_elements, max_vertices : int
        Limits on the own polygons and vertices of all cells together (every cell appears at least once in the
        flattened mask, so a file over these limits cannot flatten within them).
    max_memory_bytes : int, optional
        Memory budget in bytes; default :func:`metalay.util.budget.memory_budget` (half of the least of the
        memory available, the free part of the cgroup limit and of the address-space limit).
    circle_tolerance_db : float
        Largest gap between a CIRCLE and its polygon, database units.

    Returns
    -------
    OasisLayout

    Raises
    ------
    MaskReadError
        Malformed, truncated or corrupt file (CRC or checksum mismatch); a count over a limit.
    """
    path = os.fspath(path)
    budget = memory_budget(max_memory_bytes)
    keep = layer_filter or _layer_filter(layers)
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise MaskReadError(f"{path}: cannot open ({exc.strerror or exc})") from exc
    with fh:
        size = os.fstat(fh.fileno()).st_size
        if size == 0:
            raise MaskReadError(f"{path}: OASIS: empty file")
        mm = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
    parser = _Parser(path, mm, keep=keep, max_elements=max_elements, max_vertices=max_vertices,
                     max_memory_bytes=budget, circle_tolerance_db=circle_tolerance_db)
    try:
        return parser.run()
    except MemoryError as exc:
        raise MaskReadError(f"{path}: OASIS: out of memory while reading (lower the limits)") from exc
    finally:
        parser.buf = None
        try:
            mm.close()
        except BufferError:
            pass  # a view is still alive; the mapping closes when it is collected


@dataclass(frozen=True)
class FlattenPlan:
    """Counts of a flattening, computed before anything is expanded (exact Python ints).

    Attributes
    ----------
    tops : list of str
        Cells flattened (the chosen one, or every cell no other cell places).
    order : list of str
        Reachable cells, parents before children.
    sizes : dict of str -> (polygons, vertices)
        Flattened size of each reachable cell.
    instances : dict of str -> int
        How many times each reachable cell with geometry below it is placed in the result.
    polygons, vertices, bytes_needed : int
        Totals and the memory estimate ``2 (24 P + 16 V) + 48 * instances``.
    """

    tops: list
    order: list
    sizes: dict
    instances: dict
    polygons: int
    vertices: int
    bytes_needed: int


def plan_flatten(layout: OasisLayout, *, cell: str | None = None, max_elements: int = _DEFAULT_MAX_ELEMENTS,
                 max_vertices: int = _DEFAULT_MAX_VERTICES, max_depth: int = _DEFAULT_MAX_DEPTH,
                 max_memory_bytes: int | None = None) -> FlattenPlan:
    """Count the flattened polygons, vertices and placements bottom-up and refuse what exceeds a limit.

    Raises
    ------
    MaskReadError
        Undefined or cyclic placements, nesting deeper than ``max_depth``, a total over ``max_elements`` or
        ``max_vertices``, or an estimate over the memory budget (the message names the count).
    """
    path = layout.path
    cells = layout.cells
    for c in cells.values():
        for p in c.placements:
            if p.child not in cells:
                raise MaskReadError(f"{path}: OASIS byte {p.offset}: cell {c.name!r} places undefined cell "
                                    f"{p.child!r}")
    if cell is not None:
        if cell not in cells:
            raise MaskReadError(f"{path}: no cell named {cell!r} (available: {', '.join(sorted(cells)[:20])})")
        tops = [cell]
    else:
        placed = {p.child for c in cells.values() for p in c.placements}
        tops = [n for n in cells if n not in placed]
        if cells and not tops:
            raise MaskReadError(f"{path}: OASIS: every cell is placed by another: placement cycle")
    order = _post_order(path, cells, tops, max_depth)
    sizes: dict = {}
    for name in order:  # children first
        c = cells[name]
        p, v = c.n_polygons, c.n_vertices
        for pl in c.placements:
            cp, cv = sizes[pl.child]
            p += pl.count * cp
            v += pl.count * cv
        sizes[name] = (p, v)
    order = order[::-1]
    inst = {t: 1 for t in tops}
    for name in order:  # parents first
        for pl in cells[name].placements:
            if name in inst and sizes[pl.child][0]:
                inst[pl.child] = inst.get(pl.child, 0) + inst[name] * pl.count
    total_p = sum(sizes[t][0] for t in tops)
    total_v = sum(sizes[t][1] for t in tops)
    n_inst = sum(inst.values())
    need = 2 * (total_p * _POLY_BYTES + total_v * _VERTEX_BYTES) + _INSTANCE_BYTES * n_inst
    budget = memory_budget(max_memory_bytes)
    if total_p > max_elements:
        raise MaskReadError(f"{path}: OASIS: {total_p} polygons after expanding placements exceed the limit "
                            f"max_elements={max_elements}")
    if total_v > max_vertices:
        raise MaskReadError(f"{path}: OASIS: {total_v} vertices after expanding placements exceed the limit "
                            f"max_vertices={max_vertices}")
    if need > budget:
        raise MaskReadError(f"{path}: OASIS: flattening {total_p} polygons ({total_v} vertices, {n_inst} "
                            f"placements) needs about {need / 1e6:.0f} MB, more than the memory budget of "
                            f"{budget / 1e6:.0f} MB")
    return FlattenPlan(tops, order, sizes, inst, total_p, total_v, need)


def _post_order(path, cells, tops, max_depth):
    """Reachable cells, children before parents; refuses cycles and nesting deeper than ``max_depth``."""
    colour: dict = {}
    post: list = []
    for top in tops:
        if colour.get(top) == 2:
            continue
        stack = [(top, 0, iter(sorted({p.child for p in cells[top].placements})))]
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
                raise MaskReadError(f"{path}: OASIS: placement cycle: cell {child!r} contains itself (via {name!r})")
            if state == 0:
                if depth + 1 > max_depth:
                    raise MaskReadError(f"{path}: OASIS: placements nested deeper than {max_depth} levels "
                                        f"(at {child!r})")
                colour[child] = 1
                stack.append((child, depth + 1, iter(sorted({p.child for p in cells[child].placements}))))
    return post


def _compose(parent: np.ndarray, child: np.ndarray) -> np.ndarray:
    """All compositions parent_i o child_j, shape (m * r, 6)."""
    pa, pb, pc, pd, px, py = (parent[:, None, i] for i in range(6))
    ca, cb, cc, cd, cx, cy = (child[None, :, i] for i in range(6))
    out = np.stack([pa * ca + pb * cc, pa * cb + pb * cd, pc * ca + pd * cc, pc * cb + pd * cd,
                    pa * cx + pb * cy + px, pc * cx + pd * cy + py], axis=-1)
    return out.reshape(-1, 6)


def flatten_layout(layout: OasisLayout, plan: FlattenPlan):
    """Expand the placements of a counted layout into :class:`metalay.io.gdsread.FlatPolygons`.

    Placements at right angles without magnification keep integer coordinates exact; other angles and
    magnifications are computed in float64 and rounded half-to-even to the database grid.
    """
    from metalay.io.gdsread import FlatPolygons

    cells = layout.cells
    ident = np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])
    inst = {t: [ident] for t in plan.tops}
    if len(plan.tops) == 1 and plan.sizes[plan.tops[0]][0] == cells[plan.tops[0]].n_polygons:
        c = cells[plan.tops[0]]  # all geometry in one unplaced cell: its arrays are the result (no copy)
        if c.n_vertices and max(-int(c.xy.min()), int(c.xy.max())) >= _FLAT_COORD_LIMIT:
            raise MaskReadError(f"{layout.path}: OASIS: coordinates exceed +-2**53 database units")
        start = np.zeros(c.n_polygons + 1, np.int64)
        np.cumsum(c.counts, out=start[1:])
        return FlatPolygons(c.layer, c.datatype, start, c.xy, float(layout.db_unit_m), float(layout.user_unit_m))
    layer = np.empty(plan.polygons, np.int32)
    datatype = np.empty(plan.polygons, np.int32)
    counts = np.empty(plan.polygons, np.int64)
    xy = np.empty((plan.vertices, 2), np.int64)
    ip = iv = 0
    for name in plan.order:  # parents first
        if name not in inst:
            continue
        aff = np.concatenate(inst.pop(name))
        c = cells[name]
        for pl in c.placements:
            if plan.sizes[pl.child][0]:
                inst.setdefault(pl.child, []).append(_compose(aff, pl.affine()))
        n, nv = c.n_polygons, c.n_vertices
        if n == 0:
            continue
        step = max(1, (1 << 21) // max(1, nv))
        for lo in range(0, aff.shape[0], step):  # chunks of instances: bounded temporaries
            a = aff[lo:lo + step]
            m = a.shape[0]
            if np.all(a[:, :4] == (1.0, 0.0, 0.0, 1.0)):
                out = c.xy[None, :, :] + a[:, None, 4:].astype(np.int64)
            else:
                x, y = c.xy[None, :, 0].astype(np.float64), c.xy[None, :, 1].astype(np.float64)
                f = np.stack([a[:, 0:1] * x + a[:, 1:2] * y + a[:, 4:5], a[:, 2:3] * x + a[:, 3:4] * y + a[:, 5:6]],
                             axis=-1)
                if np.abs(f).max() >= _FLAT_COORD_LIMIT:
                    raise MaskReadError(f"{layout.path}: OASIS: flattened coordinates of cell {name!r} exceed "
                                        "+-2**53 database units")
                out = np.rint(f).astype(np.int64)
            layer[ip:ip + m * n] = np.tile(c.layer, m)
            datatype[ip:ip + m * n] = np.tile(c.datatype, m)
            counts[ip:ip + m * n] = np.tile(c.counts, m)
            xy[iv:iv + m * nv] = out.reshape(-1, 2)
            ip += m * n
            iv += m * nv
    if plan.vertices and max(-int(xy.min()), int(xy.max())) >= _FLAT_COORD_LIMIT:
        raise MaskReadError(f"{layout.path}: OASIS: flattened coordinates exceed +-2**53 database units")
    start = np.zeros(plan.polygons + 1, np.int64)
    np.cumsum(counts, out=start[1:])
    return FlatPolygons(layer, datatype, start, xy, float(layout.db_unit_m), float(layout.user_unit_m))


def read_oasis(path, *, layers=None, cell: str | None = None, max_elements: int = _DEFAULT_MAX_ELEMENTS,
               max_vertices: int = _DEFAULT_MAX_VERTICES, max_depth: int = _DEFAULT_MAX_DEPTH,
               max_memory_bytes: int | None = None, circle_tolerance_db: float = DEFAULT_CIRCLE_TOLERANCE_DB):
    """Read an OASIS mask and return every polygon flattened to database-unit integers.

    Parameters are those of :func:`parse_oasis` and :func:`plan_flatten` (``cell``: flatten only this cell;
    default every top cell).

    Returns
    -------
    metalay.io.gdsread.FlatPolygons

    Examples
    --------
    >>> flat = read_oasis("mask.oas", layers=[1])          # doctest: +SKIP
    >>> flat.count, flat.xy_db.shape                         # doctest: +SKIP
    """
    budget = memory_budget(max_memory_bytes)
    layout = parse_oasis(path, layers=layers, max_elements=max_elements, max_vertices=max_vertices,
                         max_memory_bytes=budget, circle_tolerance_db=circle_tolerance_db)
    plan = plan_flatten(layout, cell=cell, max_elements=max_elements, max_vertices=max_vertices,
                        max_depth=max_depth, max_memory_bytes=budget)
    try:
        return flatten_layout(layout, plan)
    except MemoryError as exc:
        raise MaskReadError(f"{layout.path}: OASIS: out of memory while flattening") from exc
