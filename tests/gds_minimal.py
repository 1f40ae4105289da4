"""An independent, minimal GDSII Stream Format reader for tests.

Written from the record definitions of the Calma GDSII Stream Format Manual, Release 6.0 (1987): every record
is a 2-byte big-endian length (header included), a 1-byte record type and a 1-byte data type; data type 2 is
2-byte signed integers, 3 is 4-byte signed integers, 5 is 8-byte reals (sign bit, 7-bit excess-64 exponent of 16,
56-bit mantissa), 6 is ASCII text. It shares no code with metalay.
"""

import struct

RECORD_NAMES = {0x00: "HEADER", 0x01: "BGNLIB", 0x02: "LIBNAME", 0x03: "UNITS", 0x04: "ENDLIB", 0x05: "BGNSTR",
                0x06: "STRNAME", 0x07: "ENDSTR", 0x08: "BOUNDARY", 0x0A: "SREF", 0x0B: "AREF", 0x0D: "LAYER",
                0x0E: "DATATYPE", 0x10: "XY", 0x11: "ENDEL", 0x12: "SNAME"}


def real8(b: bytes) -> float:
    sign = -1.0 if b[0] & 0x80 else 1.0
    exponent = (b[0] & 0x7F) - 64
    mantissa = int.from_bytes(b[1:8], "big")
    return sign * mantissa / 2.0 ** 56 * 16.0 ** exponent


def records(data: bytes, limit: int | None = None):
    pos = 0
    count = 0
    while pos < len(data):
        length, rtype, dtype = struct.unpack(">HBB", data[pos:pos + 4])
        payload = data[pos + 4:pos + length]
        if dtype == 2:
            value = list(struct.unpack(f">{len(payload) // 2}h", payload))
        elif dtype == 3:
            value = list(struct.unpack(f">{len(payload) // 4}i", payload))
        elif dtype == 5:
            value = [real8(payload[k:k + 8]) for k in range(0, len(payload), 8)]
        elif dtype == 6:
            value = payload.rstrip(b"\x00").decode("ascii")
        else:
            value = None
        yield RECORD_NAMES.get(rtype, hex(rtype)), value
        pos += length
        count += 1
        if limit is not None and count >= limit:
            return


def first_boundaries(data: bytes, n: int):
    """Header summary and the first n BOUNDARY elements as (layer, datatype, [(x, y), ...])."""
    info = {}
    elements = []
    current = None
    for name, value in records(data):
        if name in ("HEADER", "LIBNAME", "STRNAME"):
            info.setdefault(name, value)
        elif name == "UNITS":
            info["UNITS"] = value
        elif name == "BOUNDARY":
            current = {}
        elif current is not None and name == "LAYER":
            current["layer"] = value[0]
        elif current is not None and name == "DATATYPE":
            current["datatype"] = value[0]
        elif current is not None and name == "XY":
            current["xy"] = list(zip(value[0::2], value[1::2]))
        elif name == "ENDEL" and current is not None:
            elements.append(current)
            current = None
            if len(elements) >= n:
                break
    return info, elements
