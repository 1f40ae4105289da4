"""An independent, minimal OASIS record builder for tests (shares no code with metalay).

Written from the data-type and record definitions of SEMI P39 (OASIS): unsigned integers in 7-bit groups, least
significant first, bit 7 set when more follow; signed integers with the sign in bit 0; reals with a type prefix;
strings with a length prefix; g-deltas (form 1: octangular direction in bits 1-3, bit 0 clear; form 2: |dx| above
bit 1, x sign in bit 1, bit 0 set, then a signed dy); the file is the magic string, a START record, the records,
and a 256-byte END record whose last 4 bytes may hold a CRC32 or a byte sum of everything before them.
"""

import struct
import zlib

MAGIC = b"%SEMI-OASIS\r\n"


def u(v: int) -> bytes:
    out = bytearray()
    while True:
        b = v & 0x7F
        v >>= 7
        out.append(b | (0x80 if v else 0))
        if not v:
            return bytes(out)


def s(v: int) -> bytes:
    return u((abs(v) << 1) | (1 if v < 0 else 0))


def string(b: bytes) -> bytes:
    return u(len(b)) + b


def real(v) -> bytes:
    if isinstance(v, int):
        return (u(0) if v >= 0 else u(1)) + u(abs(v))
    return u(7) + struct.pack("<d", v)


_DIRS = {(1, 0): 0, (0, 1): 1, (-1, 0): 2, (0, -1): 3, (1, 1): 4, (-1, 1): 5, (-1, -1): 6, (1, -1): 7}


def g(dx: int, dy: int) -> bytes:
    """g-delta: form 1 when the step is along one of the 8 octangular directions, else form 2."""
    m = max(abs(dx), abs(dy))
    unit = (0 if dx == 0 else dx // abs(dx), 0 if dy == 0 else dy // abs(dy))
    if m == 0:
        return u(0)
    if (abs(dx) == abs(dy) or dx == 0 or dy == 0) and unit in _DIRS:
        return u((m << 4) | (_DIRS[unit] << 1))
    return u((abs(dx) << 2) | (2 if dx < 0 else 0) | 1) + s(dy)


def point_list_g(points) -> bytes:
    """Type 4 point list of the polygon/path ``points`` (first point is the record's x, y)."""
    d = [(points[k][0] - points[k - 1][0], points[k][1] - points[k - 1][1]) for k in range(1, len(points))]
    return u(4) + u(len(d)) + b"".join(g(*p) for p in d)


def polygon(layer, datatype, points, rep: bytes = b"") -> bytes:
    info = 0x3B | (0x04 if rep else 0)
    return (u(21) + bytes([info]) + u(layer) + u(datatype) + point_list_g(points) + s(points[0][0])
            + s(points[0][1]) + rep)


def cell(ref: int) -> bytes:
    return u(13) + u(ref)


def placement(ref: int, x: int, y: int, rep: bytes = b"") -> bytes:
    return u(17) + bytes([0xF0 | (0x08 if rep else 0)]) + u(ref) + s(x) + s(y) + rep


def cblock(records: bytes, declared: int | None = None, level: int = 6) -> bytes:
    c = zlib.compressobj(level, zlib.DEFLATED, -15)
    packed = c.compress(records) + c.flush()
    return u(34) + u(0) + u(len(records) if declared is None else declared) + u(len(packed)) + packed


def oasis(body: bytes, names=(b"TOP",), *, unit=1000, validation: int = 0, tables_in_start: bool = False,
          implicit_names: bool = True) -> bytes:
    """A whole file: START, ``body``, a CELLNAME table (reference numbers 0, 1, ...), END (256 bytes)."""
    out = bytearray(MAGIC) + u(1) + string(b"1.0") + real(unit) + u(0 if tables_in_start else 1)
    if tables_in_start:
        out += bytes(12)  # no tables given (offset 0)
    out += body
    table = len(out)
    for k, n in enumerate(names):
        out += (u(3) + string(n)) if implicit_names else (u(4) + string(n) + u(k))
    end = bytearray(u(2))
    if not tables_in_start:
        end += u(1) + u(table if names else 0) + bytes([1, 0]) * 5
    room = 256 - len(end) - 1 - (4 if validation else 0)
    pad = room - 1 if room - 1 < 128 else room - 2
    end += u(pad) + bytes(pad) + u(validation)
    out += end
    if validation == 1:
        out += (zlib.crc32(bytes(out)) & 0xFFFFFFFF).to_bytes(4, "little")
    elif validation == 2:
        out += (sum(out) & 0xFFFFFFFF).to_bytes(4, "little")
    return bytes(out)
