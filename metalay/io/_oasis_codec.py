"""OASIS (SEMI P39) primitives shared by the reader and the writer.

Encoders turn Python ints or numpy arrays into the standard's byte forms; :class:`Cursor` reads them back from a
buffer with every read bounds-checked, raising :class:`metalay.errors.MaskReadError` naming the file, the byte
offset and what was wrong. Long runs (point lists, explicit repetitions) are decoded with numpy, never with a
Python loop per value.

Formats (SEMI P39, "OASIS - Open Artwork System Interchange Standard", chapter on basic data types):

unsigned-integer
    Groups of 7 bits, least significant group first; bit 7 of a byte is set when another byte follows.
signed-integer
    The unsigned form of ``2 |v| + s`` with the sign ``s`` (1 = negative) in bit 0.
real
    An unsigned type 0-7 then: 0/1 positive/negative integer, 2/3 positive/negative reciprocal ``1/u``, 4/5
    positive/negative ratio ``u1/u2``, 6 IEEE single, 7 IEEE double (both little-endian).
string
    An unsigned length then the bytes (a-string: printable ASCII 0x20-0x7E, n-string: 0x21-0x7E, b-string: any).
1-delta, 2-delta, 3-delta, g-delta
    A signed integer along a known axis; an unsigned with the direction in its low 2 bits (E, N, W, S); an unsigned
    with the direction in its low 3 bits (E, N, W, S, NE, NW, SW, SE); and a general delta: form 1 (bit 0 = 0) is an
    octangular 3-bit direction in bits 1-3 and the magnitude above, form 2 (bit 0 = 1) is ``|dx|`` above bit 1 with
    the x sign in bit 1, followed by a signed-integer ``dy``.

The integer range accepted here is below 2**63 (a wider integer is refused); every coordinate that results from
summing deltas or repetition steps must stay within +-2**52 database units (exact in float64).
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass

import numpy as np

from metalay.errors import MaskReadError

__all__ = [
    "MAGIC", "RECORD_NAMES", "END_RECORD_BYTES", "COORD_LIMIT",
    "uint_bytes", "sint_bytes", "real_bytes", "string_bytes", "gdelta_bytes",
    "encode_varints", "encode_gdeltas", "sint_to_uint", "gdelta_items",
    "Cursor", "Repetition", "REUSE", "VarintTable",
]

MAGIC = b"%SEMI-OASIS\r\n"
#: Every END record is exactly this long (its padding string makes it so).
END_RECORD_BYTES = 256
#: Largest absolute coordinate (database units) a decoded point, offset or extent may have.
COORD_LIMIT = 2 ** 52
_INT_LIMIT = 2 ** 63

# Record ids (SEMI P39, table of record types).
PAD, START, END = 0, 1, 2
CELLNAME, CELLNAME_REF, TEXTSTRING, TEXTSTRING_REF = 3, 4, 5, 6
PROPNAME, PROPNAME_REF, PROPSTRING, PROPSTRING_REF = 7, 8, 9, 10
LAYERNAME_GEOMETRY, LAYERNAME_TEXT = 11, 12
CELL_REF, CELL_NAMED, XYABSOLUTE, XYRELATIVE = 13, 14, 15, 16
PLACEMENT, PLACEMENT_MAG, TEXT, RECTANGLE, POLYGON, PATH = 17, 18, 19, 20, 21, 22
TRAPEZOID_AB, TRAPEZOID_A, TRAPEZOID_B, CTRAPEZOID, CIRCLE = 23, 24, 25, 26, 27
PROPERTY, PROPERTY_REPEAT, XNAME, XNAME_REF, XELEMENT, XGEOMETRY, CBLOCK = 28, 29, 30, 31, 32, 33, 34

RECORD_NAMES = {
    PAD: "PAD", START: "START", END: "END", CELLNAME: "CELLNAME", CELLNAME_REF: "CELLNAME",
    TEXTSTRING: "TEXTSTRING", TEXTSTRING_REF: "TEXTSTRING", PROPNAME: "PROPNAME", PROPNAME_REF: "PROPNAME",
    PROPSTRING: "PROPSTRING", PROPSTRING_REF: "PROPSTRING", LAYERNAME_GEOMETRY: "LAYERNAME",
    LAYERNAME_TEXT: "LAYERNAME", CELL_REF: "CELL", CELL_NAMED: "CELL", XYABSOLUTE: "XYABSOLUTE",
    XYRELATIVE: "XYRELATIVE", PLACEMENT: "PLACEMENT", PLACEMENT_MAG: "PLACEMENT", TEXT: "TEXT",
    RECTANGLE: "RECTANGLE", POLYGON: "POLYGON", PATH: "PATH", TRAPEZOID_AB: "TRAPEZOID", TRAPEZOID_A: "TRAPEZOID",
    TRAPEZOID_B: "TRAPEZOID", CTRAPEZOID: "CTRAPEZOID", CIRCLE: "CIRCLE", PROPERTY: "PROPERTY",
    PROPERTY_REPEAT: "PROPERTY", XNAME: "XNAME", XNAME_REF: "XNAME", XELEMENT: "XELEMENT", XGEOMETRY: "XGEOMETRY",
    CBLOCK: "CBLOCK",
}

# Octangular directions of 3-deltas and g-delta form 1: E, N, W, S, NE, NW, SW, SE.
_DIR8_X = np.array([1, 0, -1, 0, 1, -1, -1, 1], dtype=np.int64)
_DIR8_Y = np.array([0, 1, 0, -1, 1, 1, -1, -1], dtype=np.int64)


# ----------------------------------------------------------------------------------------------------------------
# Scalar encoders
# ----------------------------------------------------------------------------------------------------------------

def uint_bytes(value: int) -> bytes:
    """Unsigned-integer form of ``value`` (0 <= value < 2**63)."""
    value = int(value)
    if value < 0 or value >= _INT_LIMIT:
        raise ValueError(f"unsigned integer {value} outside [0, 2**63)")
    if value < 128:
        return bytes((value,))
    out = bytearray()
    while value >= 128:
        out.append((value & 127) | 128)
        value >>= 7
    out.append(value)
    return bytes(out)


def sint_bytes(value: int) -> bytes:
    """Signed-integer form of ``value`` (|value| < 2**62): magnitude above bit 0, sign in bit 0."""
    value = int(value)
    return uint_bytes((-value << 1) | 1 if value < 0 else value << 1)


def real_bytes(value: float) -> bytes:
    """Real form: type 0/1 (integer) when ``value`` is a whole number below 2**53, else type 7 (IEEE double)."""
    v = float(value)
    if not math.isfinite(v):
        raise ValueError(f"real {value} is not finite")
    if v == int(v) and abs(v) < 2 ** 53:
        return (b"\x00" if v >= 0 else b"\x01") + uint_bytes(abs(int(v)))
    return b"\x07" + struct.pack("<d", v)


def string_bytes(text: bytes) -> bytes:
    """String form: length then bytes."""
    return uint_bytes(len(text)) + bytes(text)


def gdelta_bytes(dx: int, dy: int) -> bytes:
    """g-delta form of (dx, dy): form 1 for octangular deltas, form 2 otherwise."""
    dx, dy = int(dx), int(dy)
    for d in range(8):
        m = abs(dx) if dx else abs(dy)
        if dx == _DIR8_X[d] * m and dy == _DIR8_Y[d] * m:
            return uint_bytes((m << 4) | (d << 1))
    return uint_bytes((abs(dx) << 2) | (2 if dx < 0 else 0) | 1) + sint_bytes(dy)


# ----------------------------------------------------------------------------------------------------------------
# Vectorised encoders
# ----------------------------------------------------------------------------------------------------------------

def encode_varints(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unsigned-integer forms of many values at once.

    Parameters
    ----------
    values : ndarray (K,) uint64
        Values below 2**63.

    Returns
    -------
    data : ndarray (B,) uint8
        The encoded bytes, item after item.
    lengths : ndarray (K,) int64
        Bytes per item.
    """
    u = np.ascontiguousarray(values, dtype=np.uint64)
    lengths, nb = _varint_lengths(u)
    if nb == 1:
        return u.astype(np.uint8), lengths.astype(np.int64)
    lens = lengths.astype(np.int64)
    ends = np.cumsum(lens)
    out = np.empty(int(ends[-1]), dtype=np.uint8)
    _scatter_varints(out, ends - lens, u, lengths, nb)
    return out, lens


def sint_to_uint(values: np.ndarray) -> np.ndarray:
    """Signed-integer values (int64, |v| < 2**62) as the unsigned values that encode them."""
    v = np.asarray(values, dtype=np.int64)
    return np.where(v < 0, ((-v) << 1) | 1, v << 1).astype(np.uint64)


_DIR_OF_SIGNS = np.array([6, 2, 5, 3, 0, 1, 7, 0, 4], dtype=np.int64)  # index 3 (sx + 1) + (sy + 1)


def gdelta_items(dx: np.ndarray, dy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """g-deltas of many (dx, dy) pairs as unsigned values: one value (form 1) or two (form 2) per delta.

    Returns
    -------
    values : ndarray (K,) uint64
        The unsigned values in order.
    owner : ndarray (K,) int64
        Index of the delta each value belongs to (non-decreasing).
    """
    dx = np.asarray(dx, dtype=np.int64)
    dy = np.asarray(dy, dtype=np.int64)
    ax, ay = np.abs(dx), np.abs(dy)
    octo = (ax == ay) | (dx == 0) | (dy == 0)
    direction = _DIR_OF_SIGNS[3 * np.sign(dx) + np.sign(dy) + 4]
    first = np.where(octo, (np.maximum(ax, ay) << 4) | (direction << 1), (ax << 2) | ((dx < 0) << 1) | 1)
    if octo.all():
        return first.astype(np.uint64), np.arange(dx.shape[0], dtype=np.int64)
    n_items = 2 - octo
    ends = np.cumsum(n_items)
    starts = ends - n_items
    values = np.empty(int(ends[-1]), dtype=np.uint64)
    values[starts] = first.astype(np.uint64)
    values[starts[~octo] + 1] = sint_to_uint(dy[~octo])
    owner = np.repeat(np.arange(dx.shape[0], dtype=np.int64), n_items)
    return values, owner


def _varint_lengths(u: np.ndarray) -> tuple[np.ndarray, int]:
    """Byte count of each unsigned-integer form (uint8) and the largest."""
    top = int(u.max(initial=0))
    nb = 1
    lengths = np.ones(u.shape[0], dtype=np.uint8)
    while nb < 9 and top >= 1 << (7 * nb):
        lengths += u >= np.uint64(1 << (7 * nb))
        nb += 1
    return lengths, nb


def _scatter_varints(out: np.ndarray, pos: np.ndarray, u: np.ndarray, lengths: np.ndarray, nb: int) -> None:
    """Write the unsigned-integer form of every ``u[i]`` (``lengths[i]`` bytes) at ``out[pos[i]:]``."""
    for k in range(nb):  # byte k of the values that have one (a short axis)
        if k:
            idx = np.flatnonzero(lengths > k)
            pos, u, lengths = pos[idx], u[idx], lengths[idx]
        out[pos + k] = ((u >> np.uint64(7 * k)) & np.uint64(127)).astype(np.uint8) | (
            (lengths > k + 1).astype(np.uint8) << 7)


def encode_gdeltas(dx: np.ndarray, dy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """g-delta bytes of many (dx, dy) pairs at once (the same bytes as :func:`gdelta_bytes` one by one).

    Returns
    -------
    data : ndarray (B,) uint8
        The g-deltas back to back.
    lengths : ndarray (K,) int64
        Bytes per g-delta.
    """
    dx = np.asarray(dx, dtype=np.int64)
    dy = np.asarray(dy, dtype=np.int64)
    ax, ay = np.abs(dx), np.abs(dy)
    octo = (ax == ay) | (dx == 0) | (dy == 0)
    direction = _DIR_OF_SIGNS[3 * np.sign(dx) + np.sign(dy) + 4]
    first = np.where(octo, (np.maximum(ax, ay) << 4) | (direction << 1),
                     (ax << 2) | ((dx < 0) << 1) | 1).astype(np.uint64)
    l1, nb1 = _varint_lengths(first)
    lengths = l1.astype(np.int64)
    form2 = np.flatnonzero(~octo)
    if form2.size:
        second = ((ay[form2] << 1) | (dy[form2] < 0)).astype(np.uint64)
        l2, nb2 = _varint_lengths(second)
        lengths[form2] += l2
    ends = np.cumsum(lengths)
    pos = ends - lengths
    out = np.empty(int(ends[-1]) if ends.size else 0, dtype=np.uint8)
    _scatter_varints(out, pos, first, l1, nb1)
    if form2.size:
        _scatter_varints(out, pos[form2] + l1[form2], second, l2, nb2)
    return out, lengths


# ----------------------------------------------------------------------------------------------------------------
# Repetitions
# ----------------------------------------------------------------------------------------------------------------

REUSE = object()
"""Returned by :meth:`Cursor.repetition` for type 0 (reuse the modal repetition)."""


@dataclass(frozen=True)
class Repetition:
    """One OASIS repetition, unexpanded.

    Either a lattice of ``nx * ny`` positions ``i a + j b`` (types 1, 2, 3, 8, 9) or explicit ``offsets``
    (types 4-7, 10, 11; the first offset is (0, 0)).

    Attributes
    ----------
    kind : int
        The repetition type as read (1-11).
    nx, ny : int
        Lattice dimensions (Python ints, never overflowing); 0 for explicit kinds.
    a, b : tuple of int
        Lattice step vectors (database units).
    explicit : ndarray (n, 2) int64 or None
        Offsets of an explicit repetition.
    """

    kind: int
    nx: int = 0
    ny: int = 0
    a: tuple = (0, 0)
    b: tuple = (0, 0)
    explicit: np.ndarray | None = None

    @property
    def count(self) -> int:
        """Number of positions (exact Python int)."""
        return self.explicit.shape[0] if self.explicit is not None else self.nx * self.ny

    def offsets(self) -> np.ndarray:
        """All positions, shape (count, 2) int64, x index fastest for lattices. Call only after counting."""
        if self.explicit is not None:
            return self.explicit
        i = np.arange(self.nx, dtype=np.int64)
        j = np.arange(self.ny, dtype=np.int64)
        out = np.empty((self.ny, self.nx, 2), dtype=np.int64)
        out[..., 0] = j[:, None] * self.b[0] + i[None, :] * self.a[0]
        out[..., 1] = j[:, None] * self.b[1] + i[None, :] * self.a[1]
        return out.reshape(-1, 2)


# ----------------------------------------------------------------------------------------------------------------
# Decoding
# ----------------------------------------------------------------------------------------------------------------

class Cursor:
    """Bounds-checked reader of OASIS primitives from ``buf[pos:end]``.

    Parameters
    ----------
    buf : bytes-like
        The file (or an inflated CBLOCK).
    path : str
        File name for messages.
    pos, end : int
        Read window.
    where : callable, optional
        Maps a position in ``buf`` to a description for messages (default ``"byte <pos>"``).
    """

    __slots__ = ("buf", "arr", "pos", "end", "path", "where")

    def __init__(self, buf, path: str, pos: int = 0, end: int | None = None, where=None):
        self.buf = buf
        self.arr = np.frombuffer(buf, dtype=np.uint8)
        self.pos = pos
        self.end = len(buf) if end is None else end
        self.path = path
        self.where = where or (lambda p: f"byte {p}")

    def fail(self, msg: str, at: int | None = None):
        """Raise a one-line :class:`MaskReadError` naming the file and the byte offset."""
        raise MaskReadError(f"{self.path}: OASIS {self.where(self.pos if at is None else at)}: {msg}")

    def byte(self) -> int:
        if self.pos >= self.end:
            self.fail("truncated: a byte expected, the data ends here")
        b = self.buf[self.pos]
        self.pos += 1
        return b

    def take(self, n: int) -> bytes:
        if n > self.end - self.pos:
            self.fail(f"truncated: {n} bytes expected, {self.end - self.pos} left")
        out = bytes(self.buf[self.pos:self.pos + n])
        self.pos += n
        return out

    def uint(self) -> int:
        pos, buf = self.pos, self.buf
        if pos >= self.end:
            self.fail("truncated: an integer expected, the data ends here")
        b = buf[pos]
        if b < 128:
            self.pos = pos + 1
            return b
        start = pos
        value = b & 127
        shift = 7
        pos += 1
        while True:
            if pos >= self.end:
                self.fail("truncated inside an integer", start)
            b = buf[pos]
            pos += 1
            value |= (b & 127) << shift
            if b < 128:
                break
            shift += 7
            if shift > 63:
                self.fail("integer longer than 10 bytes (allowed: below 2**63)", start)
        if value >= _INT_LIMIT:
            self.fail(f"integer {value} too large (allowed: below 2**63)", start)
        self.pos = pos
        return value

    def sint(self) -> int:
        u = self.uint()
        return -(u >> 1) if u & 1 else u >> 1

    def coord(self, what: str = "coordinate") -> int:
        """A signed integer that is a coordinate or delta: must lie within +-COORD_LIMIT."""
        at = self.pos
        v = self.sint()
        if abs(v) > COORD_LIMIT:
            self.fail(f"{what} {v} beyond +-2**52 database units", at)
        return v

    def length(self, what: str) -> int:
        """An unsigned integer that is a length (width, height, radius): within COORD_LIMIT."""
        at = self.pos
        v = self.uint()
        if v > COORD_LIMIT:
            self.fail(f"{what} {v} beyond 2**52 database units", at)
        return v

    def real(self) -> float:
        at = self.pos
        return self.real_body(self.uint(), at)

    def real_body(self, t: int, at: int) -> float:
        """The value of a real whose type ``t`` has been read (at byte ``at``)."""
        if t <= 1:
            v = float(self.uint())
        elif t <= 5:
            num = self.uint() if t >= 4 else 1
            den = self.uint()
            if den == 0:
                self.fail(f"real of type {t} with a zero denominator", at)
            v = num / den
        elif t == 6:
            v = struct.unpack("<f", self.take(4))[0]
        elif t == 7:
            v = struct.unpack("<d", self.take(8))[0]
        else:
            self.fail(f"real of unknown type {t} (allowed: 0-7)", at)
        if t in (1, 3, 5):
            v = -v
        if not math.isfinite(v):
            self.fail("real is not finite", at)
        return v

    def string(self) -> bytes:
        at = self.pos
        n = self.uint()
        if n > self.end - self.pos:
            self.fail(f"string of {n} bytes runs past the end ({self.end - self.pos} bytes left)", at)
        return self.take(n)

    def nstring(self, what: str) -> str:
        """An n-string (printable ASCII 0x21-0x7E, not empty), decoded."""
        at = self.pos
        raw = self.string()
        if not raw or min(raw) < 0x21 or max(raw) > 0x7E:
            self.fail(f"{what} {raw[:40]!r} is not an n-string (allowed: 1 or more bytes 0x21-0x7E)", at)
        return raw.decode("ascii")

    # ------------------------------------------------------------------ runs of integers, vectorised

    def _varints(self, count: int, what: str, *, exact: bool = True) -> tuple[np.ndarray, np.ndarray]:
        """Decode ``count`` consecutive unsigned integers (``exact``) or up to ``count`` complete ones.

        Returns (values uint64, end offset after each value, relative to the start). Does not move the cursor.
        """
        start = self.pos
        window = self.arr[start:min(self.end, start + 10 * count)]
        term = np.flatnonzero(window < 128)[:count]
        if term.shape[0] < count and exact:
            self.fail(f"truncated or malformed {what}: {count} integers expected, {term.shape[0]} complete ones "
                      "follow", start)
        if term.shape[0] == 0:
            return np.zeros(0, np.uint64), np.zeros(0, np.int64)
        ends = term + 1
        starts = np.concatenate([[0], ends[:-1]])
        lens = ends - starts
        if lens.max() > 10:
            self.fail(f"integer longer than 10 bytes in {what}", start + int(starts[np.argmax(lens > 10)]))
        seg = window[:int(ends[-1])]
        local = np.arange(seg.shape[0], dtype=np.int64) - np.repeat(starts, lens)
        if np.any(seg[local == 9] & 127):
            self.fail(f"integer too large in {what} (allowed: below 2**63)", start)
        groups = (seg & 127).astype(np.uint64) << (7 * local).astype(np.uint64)
        return np.add.reduceat(groups, starts), ends

    def uints(self, count: int, what: str) -> np.ndarray:
        """``count`` unsigned integers (uint64)."""
        if count > self.end - self.pos:
            self.fail(f"{what}: {count} integers declared, only {self.end - self.pos} bytes left")
        if count == 0:
            return np.zeros(0, np.uint64)
        vals, ends = self._varints(count, what)
        self.pos += int(ends[-1])
        return vals

    def gdeltas(self, count: int, what: str) -> np.ndarray:
        """``count`` g-deltas as an (count, 2) int64 array."""
        if count > self.end - self.pos:
            self.fail(f"{what}: {count} g-deltas declared, only {self.end - self.pos} bytes left")
        if count == 0:
            return np.zeros((0, 2), np.int64)
        start = self.pos
        vals, ends = self._varints(2 * count, what, exact=False)
        k = vals.shape[0]
        idx = np.arange(k, dtype=np.int64)
        # an index after an even (form 1) value always begins a delta; inside a run of odd values, every second
        even_at = np.where((vals & np.uint64(1)) == 0, idx, -1)
        prev_even = np.concatenate([[-1], np.maximum.accumulate(even_at)[:-1]])
        heads = np.flatnonzero((idx - prev_even - 1) % 2 == 0)[:count]
        if heads.shape[0] < count or (vals[heads[-1]] & np.uint64(1) and heads[-1] + 1 >= k):
            self.fail(f"truncated {what}: {count} g-deltas expected", start)
        v = vals[heads]
        form2 = (v & np.uint64(1)).astype(bool)
        out = np.empty((count, 2), dtype=np.int64)
        d = ((v >> np.uint64(1)) & np.uint64(7)).astype(np.int64)
        mag = (v >> np.uint64(4)).astype(np.int64)
        out[:, 0] = _DIR8_X[d] * mag
        out[:, 1] = _DIR8_Y[d] * mag
        if form2.any():
            h2 = heads[form2]
            u1 = vals[h2]
            u2 = vals[h2 + 1]
            mx = (u1 >> np.uint64(2)).astype(np.int64)
            out[form2, 0] = np.where((u1 & np.uint64(2)) != 0, -mx, mx)
            my = (u2 >> np.uint64(1)).astype(np.int64)
            out[form2, 1] = np.where((u2 & np.uint64(1)) != 0, -my, my)
        last = int(heads[-1]) + (2 if form2[-1] else 1)
        self.pos = start + int(ends[last - 1])
        if np.abs(out).max() > COORD_LIMIT:
            self.fail(f"{what}: a delta beyond +-2**52 database units", start)
        return out

    def gdelta(self) -> tuple[int, int]:
        at = self.pos
        u = self.uint()
        if u & 1:
            dx = -(u >> 2) if u & 2 else u >> 2
            dy = self.sint()
        else:
            d = (u >> 1) & 7
            m = u >> 4
            dx, dy = int(_DIR8_X[d]) * m, int(_DIR8_Y[d]) * m
        if abs(dx) > COORD_LIMIT or abs(dy) > COORD_LIMIT:
            self.fail("g-delta beyond +-2**52 database units", at)
        return dx, dy

    # ------------------------------------------------------------------ point lists and repetitions

    def point_list(self, *, polygon: bool) -> np.ndarray:
        """A point list as vertices relative to the first (which is (0, 0)), shape (n, 2) int64.

        For polygons, types 0 and 1 get their implied last vertex (the one that makes the closing edges
        axis-parallel); for paths they do not.
        """
        at = self.pos
        t = self.uint()
        n = self.uint()
        what = f"point list of type {t}"
        if t > 5:
            self.fail(f"point list of unknown type {t} (allowed: 0-5)", at)
        if n > self.end - self.pos:
            self.fail(f"{what}: {n} points declared, only {self.end - self.pos} bytes left", at)
        if t <= 1:
            u = self.uints(n, what)
            mag = (u >> np.uint64(1)).astype(np.int64)
            v = np.where((u & np.uint64(1)) != 0, -mag, mag)
            d = np.zeros((n, 2), np.int64)
            axis = (np.arange(n) + t) % 2  # type 0 starts horizontal, type 1 vertical
            d[np.arange(n), axis] = v
        elif t <= 3:
            u = self.uints(n, what)
            bits = 2 if t == 2 else 3
            dirn = (u & np.uint64((1 << bits) - 1)).astype(np.int64)
            mag = (u >> np.uint64(bits)).astype(np.int64)
            d = np.stack([_DIR8_X[dirn] * mag, _DIR8_Y[dirn] * mag], axis=1)
        else:
            d = self.gdeltas(n, what)
            if t == 5:
                d = _checked_cumsum(self, d, at, what)
        pts = np.zeros((n + 1, 2), np.int64)
        pts[1:] = _checked_cumsum(self, d, at, what)
        if polygon and t <= 1 and n > 0:
            nxt = (n + t) % 2  # axis of the implied next delta: it brings that coordinate back to 0
            extra = pts[-1].copy()
            extra[nxt] = 0
            pts = np.concatenate([pts, extra[None]])
        return pts

    def repetition(self):
        """A repetition (:class:`Repetition`) or :data:`REUSE` for type 0."""
        at = self.pos
        t = self.uint()
        if t == 0:
            return REUSE
        if t == 1:
            nx, ny = self.uint() + 2, self.uint() + 2
            rep = Repetition(1, nx, ny, (self.length("x-space"), 0), (0, self.length("y-space")))
        elif t in (2, 3):
            n = self.uint() + 2
            s = self.length("space")
            rep = Repetition(t, n, 1, (s, 0)) if t == 2 else Repetition(t, 1, n, (0, 0), (0, s))
        elif t in (4, 5, 6, 7):
            n = self.uint() + 2
            grid = self.length("grid") if t in (5, 7) else 1
            if n - 1 > self.end - self.pos:
                self.fail(f"repetition of type {t}: {n} positions declared, only {self.end - self.pos} bytes left",
                          at)
            steps = self.uints(n - 1, f"repetition of type {t}").astype(np.float64) * grid
            if steps.size and steps.max() * n > COORD_LIMIT:
                self.fail(f"repetition of type {t} reaches beyond 2**52 database units", at)
            pos = np.zeros(n, np.int64)
            np.cumsum(steps.astype(np.int64), out=pos[1:])
            off = np.zeros((n, 2), np.int64)
            off[:, 0 if t in (4, 5) else 1] = pos
            rep = Repetition(t, explicit=off)
        elif t in (8, 9):
            nx = self.uint() + 2
            ny = self.uint() + 2 if t == 8 else 1
            a = self.gdelta()
            b = self.gdelta() if t == 8 else (0, 0)
            rep = Repetition(t, nx, ny, a, b)
        elif t in (10, 11):
            n = self.uint() + 2
            grid = self.length("grid") if t == 11 else 1
            if n - 1 > self.end - self.pos:
                self.fail(f"repetition of type {t}: {n} positions declared, only {self.end - self.pos} bytes left",
                          at)
            d = self.gdeltas(n - 1, f"repetition of type {t}")
            if grid != 1:
                if d.size and float(np.abs(d).max()) * grid > COORD_LIMIT:
                    self.fail(f"repetition of type {t} reaches beyond 2**52 database units", at)
                d = d * grid
            off = np.zeros((n, 2), np.int64)
            off[1:] = _checked_cumsum(self, d, at, f"repetition of type {t}")
            rep = Repetition(t, explicit=off)
        else:
            self.fail(f"repetition of unknown type {t} (allowed: 0-11)", at)
        if rep.explicit is None:
            reach = (rep.nx - 1) * (abs(rep.a[0]) + abs(rep.a[1])) + (rep.ny - 1) * (abs(rep.b[0]) + abs(rep.b[1]))
            if reach > COORD_LIMIT:
                self.fail(f"repetition of type {t} ({rep.nx} x {rep.ny}) reaches beyond 2**52 database units", at)
        return rep


class VarintTable:
    """Integer boundaries and values of a byte region, for decoding runs of integers without a loop per integer.

    Every byte below 128 ends an unsigned integer, so a run of integers that starts right after another integer
    (as every point list and explicit repetition does) is a run of consecutive segments of this table. g-delta
    runs need one more fact: the integer after an even one (a form-1 g-delta, or the second half of a form-2
    one) always begins a g-delta, and inside a run of odd integers every second one does; so the g-deltas of a
    run follow from the region-wide parity pattern, with only the stretch before the run's first even integer
    depending on where the run starts.

    Parameters
    ----------
    arr : ndarray (S,) uint8
        The whole buffer.
    lo, hi : int
        The region ``arr[lo:hi]``; ``lo`` must be an integer boundary.
    """

    def __init__(self, arr: np.ndarray, lo: int, hi: int):
        reg = arr[lo:hi]
        term = reg < 128
        self.lo, self.hi = lo, hi
        self.T = np.flatnonzero(term)
        n = self.n = self.T.shape[0]
        starts = np.zeros(n, np.int64)
        starts[1:] = self.T[:-1] + 1
        lens = self.T - starts + 1
        v = (reg[starts] & 127).astype(np.uint64)
        for j in range(1, int(min(lens.max(initial=1), 10))):  # byte j of the integers that have one
            idx = np.flatnonzero(lens > j)
            v[idx] |= (reg[starts[idx] + j] & 127).astype(np.uint64) << np.uint64(7 * j)
        self.V = v
        bad = lens > 10
        ten = np.flatnonzero(lens == 10)
        bad[ten] |= (reg[starts[ten] + 9] & 127) != 0  # a tenth 7-bit group would make it 2**63 or more
        self.PB = np.concatenate([[0], np.cumsum(bad)])
        idx = np.arange(n)
        even = (v & np.uint64(1)) == 0
        prev_even = np.concatenate([[-1], np.maximum.accumulate(np.where(even, idx, -1))[:-1]])
        heads = ((idx - prev_even - 1) & 1) == 0
        self.PH = np.concatenate([[0], np.cumsum(heads)])
        self.GH = np.flatnonzero(heads)
        nxt = np.where(even, idx, n)
        self.NE = np.concatenate([np.minimum.accumulate(nxt[::-1])[::-1], [n]])

    def index(self, pos: int) -> int:
        """Segment number of the integer that starts at buffer position ``pos`` (an integer boundary)."""
        return int(np.searchsorted(self.T, pos - self.lo))  # integers that end before ``pos``

    def end(self, k: int) -> int:
        """Buffer position just after segment ``k - 1``."""
        return self.lo + int(self.T[k - 1]) + 1

    def check(self, cur: "Cursor", k0: int, k1: int, what: str, at: int) -> None:
        """Refuse the run of segments [k0, k1) when it is cut off or holds an integer of 2**63 or more."""
        if k1 > self.n:
            cur.fail(f"truncated {what}: the data ends inside it", at)
        if self.PB[k1] - self.PB[k0]:
            cur.fail(f"integer too large in {what} (allowed: below 2**63)", at)

    def g_span(self, cur: "Cursor", pos: int, count: int, what: str):
        """Locate ``count`` g-deltas starting at ``pos``: returns (k0, n_local, g0, n_global, end position).

        The g-deltas begin at segments ``k0, k0 + 2, ...`` (``n_local`` of them, up to the first even integer)
        and then at the region-wide heads ``GH[g0:g0 + n_global]``.
        """
        k0 = self.index(pos)
        if k0 >= self.n:
            cur.fail(f"truncated {what}: the data ends inside it", pos)
        e0 = int(self.NE[k0])
        n_local = min(count, (e0 - k0) // 2 + 1)
        n_global = count - n_local
        g0 = int(self.PH[min(e0 + 1, self.n)])
        if n_global:
            if g0 + n_global > self.GH.shape[0]:
                cur.fail(f"truncated {what}: {count} g-deltas expected", pos)
            last = int(self.GH[g0 + n_global - 1])
        else:
            last = k0 + 2 * (n_local - 1)
        k1 = last + (2 if last < self.n and self.V[last] & np.uint64(1) else 1)
        self.check(cur, k0, k1, what, pos)
        return k0, n_local, g0, n_global, self.end(k1)

    def g_complete(self, k0: int) -> int:
        """How many whole g-deltas the region holds from segment ``k0`` on (the last may be cut by its end)."""
        n = self.n
        if k0 >= n:
            return 0
        e0 = int(self.NE[k0])
        if e0 >= n:  # only odd integers follow: every second one begins a g-delta that needs the next one
            return max(0, (n - 2 - k0) // 2 + 1)
        g0 = int(self.PH[e0 + 1])
        tail = int(self.GH.shape[0]) - g0
        if tail and int(self.GH[-1]) == n - 1 and self.V[n - 1] & np.uint64(1):
            tail -= 1
        return (e0 - k0) // 2 + 1 + tail

    def u_span(self, cur: "Cursor", pos: int, count: int, what: str):
        """Locate ``count`` integers starting at ``pos``: returns (k0, end position)."""
        k0 = self.index(pos)
        self.check(cur, k0, k0 + count, what, pos)
        return k0, self.end(k0 + count)

    def gdeltas(self, k0: np.ndarray, n_local: np.ndarray, g0: np.ndarray, n_global: np.ndarray) -> np.ndarray:
        """The g-deltas of many located runs, back to back: (sum of counts, 2) int64."""
        lens = np.stack([n_local, n_global], axis=1).ravel()
        total = int(lens.sum())
        piece = np.repeat(np.arange(lens.shape[0]), lens)
        j = np.arange(total) - np.repeat(np.cumsum(lens) - lens, lens)
        local = (piece & 1) == 0
        run = piece >> 1
        heads = np.where(local, k0[run] + 2 * j, self.GH[np.minimum(g0[run] + j, max(self.GH.shape[0] - 1, 0))]
                         if self.GH.shape[0] else 0)
        u1 = self.V[heads]
        out = np.empty((total, 2), np.int64)
        d = ((u1 >> np.uint64(1)) & np.uint64(7)).astype(np.int64)
        mag = (u1 >> np.uint64(4)).astype(np.int64)
        out[:, 0] = _DIR8_X[d] * mag
        out[:, 1] = _DIR8_Y[d] * mag
        f2 = np.flatnonzero(u1 & np.uint64(1))
        if f2.size:
            a, b = u1[f2], self.V[heads[f2] + 1]
            mx = (a >> np.uint64(2)).astype(np.int64)
            my = (b >> np.uint64(1)).astype(np.int64)
            out[f2, 0] = np.where((a & np.uint64(2)) != 0, -mx, mx)
            out[f2, 1] = np.where((b & np.uint64(1)) != 0, -my, my)
        return out

    def values(self, k0: np.ndarray, count: np.ndarray) -> np.ndarray:
        """The integers of many located runs, back to back (uint64)."""
        total = int(count.sum())
        j = np.arange(total) - np.repeat(np.cumsum(count) - count, count)
        return self.V[np.repeat(k0, count) + j]


def _checked_cumsum(cur: Cursor, d: np.ndarray, at: int, what: str) -> np.ndarray:
    """Cumulative sum of deltas (n, 2) int64, refused when a partial sum would leave +-COORD_LIMIT."""
    if d.shape[0] == 0:
        return d.copy()
    approx = np.cumsum(d.astype(np.float64), axis=0)
    if np.abs(approx).max() > COORD_LIMIT:
        cur.fail(f"{what}: coordinates beyond +-2**52 database units", at)
    return np.cumsum(d, axis=0)
