"""Mask reader: exact read-back of files made by an independent minimal GDSII writer, by gdstk (GDSII and OASIS),
hostile input (truncation, bad lengths, cycles, huge counts) and hypothesis fuzzing of the bytes."""

from __future__ import annotations

import math
import struct
import time

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from metalay.errors import MaskReadError
from metalay.io.gdsread import FlatPolygons, _real8, mask_info, read_mask

# ------------------------------------------------------------------------------------------------------------------
# An independent minimal GDSII writer, written from the record descriptions of the format manual.
# Source: Calma Company, GDSII Stream Format Manual, Release 6.0 (1987): each record is a 2-byte big-endian total
# length (header included), a 1-byte record type and a 1-byte data type; 2-byte and 4-byte signed integers are
# big-endian two's complement; an 8-byte real is sign bit, 7-bit excess-64 exponent of 16, 56-bit mantissa.
# Record type numbers (record type, data type): HEADER 00 02, BGNLIB 01 02, LIBNAME 02 06, UNITS 03 05,
# ENDLIB 04 00, BGNSTR 05 02, STRNAME 06 06, ENDSTR 07 00, BOUNDARY 08 00, PATH 09 00, SREF 0A 00, AREF 0B 00,
# TEXT 0C 00, LAYER 0D 02, DATATYPE 0E 02, WIDTH 0F 03, XY 10 03, ENDEL 11 00, SNAME 12 06, COLROW 13 02,
# TEXTTYPE 16 02, STRING 19 06, STRANS 1A 01, MAG 1B 05, ANGLE 1C 05, PATHTYPE 21 02, BOX 2D 00, BOXTYPE 2E 02.
# ------------------------------------------------------------------------------------------------------------------


def rec(rtype: int, dtype: int, payload: bytes = b"") -> bytes:
    if len(payload) % 2:
        payload += b"\0"
    return struct.pack(">HBB", 4 + len(payload), rtype, dtype) + payload


def real8(x: float) -> bytes:
    """Encode an 8-byte GDSII real by exact integer arithmetic (frexp), independent of the reader's decoder."""
    if x == 0:
        return bytes(8)
    sign = 0x80 if x < 0 else 0
    m, e = math.frexp(abs(x))  # x = m * 2**e, 0.5 <= m < 1
    # choose exponent of 16 so that mantissa fraction is in [1/16, 1)
    e16 = math.ceil(e / 4)
    frac = abs(x) / 16.0 ** e16
    mant = int(round(frac * 2 ** 56))
    return bytes([sign | (e16 + 64)]) + mant.to_bytes(7, "big")


def s(text: str) -> bytes:
    return text.encode("ascii")


def i16(*v) -> bytes:
    return struct.pack(f">{len(v)}h", *v)


def i32(*v) -> bytes:
    return struct.pack(f">{len(v)}i", *v)


def lib_bytes(structures: list[tuple[str, list[bytes]]], db_in_user=1e-3, db_m=1e-9) -> bytes:
    out = rec(0x00, 2, i16(600)) + rec(0x01, 2, i16(*[0] * 12)) + rec(0x02, 6, s("TESTLIB"))
    out += rec(0x03, 5, real8(db_in_user) + real8(db_m))
    for name, elements in structures:
        out += rec(0x05, 2, i16(*[0] * 12)) + rec(0x06, 6, s(name))
        out += b"".join(elements)
        out += rec(0x07, 0)
    return out + rec(0x04, 0)


def boundary(layer, datatype, pts, close=True) -> bytes:
    pts = list(pts) + ([pts[0]] if close else [])
    flat = [c for p in pts for c in p]
    return rec(0x08, 0) + rec(0x0D, 2, i16(layer)) + rec(0x0E, 2, i16(datatype)) + rec(0x10, 3, i32(*flat)) + rec(
        0x11, 0)


def box(layer, boxtype, x0, y0, x1, y1) -> bytes:
    pts = [(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)]
    return rec(0x2D, 0) + rec(0x0D, 2, i16(layer)) + rec(0x2E, 2, i16(boxtype)) + rec(
        0x10, 3, i32(*[c for p in pts for c in p])) + rec(0x11, 0)


def path(layer, width, pts, pathtype=0) -> bytes:
    return (rec(0x09, 0) + rec(0x0D, 2, i16(layer)) + rec(0x0E, 2, i16(0)) + rec(0x21, 2, i16(pathtype))
            + rec(0x0F, 3, i32(width)) + rec(0x10, 3, i32(*[c for p in pts for c in p])) + rec(0x11, 0))


def text(layer, x, y, string) -> bytes:
    return (rec(0x0C, 0) + rec(0x0D, 2, i16(layer)) + rec(0x16, 2, i16(0)) + rec(0x10, 3, i32(x, y))
            + rec(0x19, 6, s(string)) + rec(0x11, 0))


def sref(name, x, y, angle=None, mag=None, reflect=False) -> bytes:
    out = rec(0x0A, 0) + rec(0x12, 6, s(name))
    if angle is not None or mag is not None or reflect:
        out += rec(0x1A, 1, struct.pack(">H", 0x8000 if reflect else 0))
        if mag is not None:
            out += rec(0x1B, 5, real8(mag))
        if angle is not None:
            out += rec(0x1C, 5, real8(angle))
    return out + rec(0x10, 3, i32(x, y)) + rec(0x11, 0)


def aref(name, cols, rows, origin, pcol, prow, angle=None) -> bytes:
    out = rec(0x0B, 0) + rec(0x12, 6, s(name))
    if angle is not None:
        out += rec(0x1A, 1, struct.pack(">H", 0)) + rec(0x1C, 5, real8(angle))
    return out + rec(0x13, 2, i16(cols, rows)) + rec(0x10, 3, i32(*origin, *pcol, *prow)) + rec(0x11, 0)


def polys_of(fp: FlatPolygons):
    """Sorted list of (layer, datatype, vertex tuple) with each ring rotated to start at its smallest vertex."""
    out = []
    for k in range(fp.count):
        ring = [tuple(v) for v in fp.xy_db[fp.start[k]:fp.start[k + 1]].tolist()]
        i = ring.index(min(ring))
        out.append((int(fp.layer[k]), int(fp.datatype[k]), tuple(ring[i:] + ring[:i])))
    return sorted(out)


def canon(layer, datatype, pts):
    ring = [tuple(p) for p in pts]
    i = ring.index(min(ring))
    return (layer, datatype, tuple(ring[i:] + ring[:i]))


FIN = [(-125, -42), (125, -42), (125, 42), (-125, 42)]


@pytest.fixture
def hier_file(tmp_path):
    data = lib_bytes([
        ("FIN", [boundary(1, 0, FIN)]),
        ("PAIR", [sref("FIN", 0, 0), sref("FIN", 1000, 0, angle=90.0)]),
        ("TOP", [sref("PAIR", 0, 5000, reflect=True), aref("FIN", 3, 2, (0, -3000), (3 * 400, -3000),
                                                            (0, -3000 + 2 * 500)),
                 box(2, 0, -10000, -10000, 10000, 10000), text(3, 0, 0, "label")]),
    ])
    p = tmp_path / "hier.gds"
    p.write_bytes(data)
    return p


def test_real8_decoding_known_values():
    # Source: Calma GDSII Stream Format Manual Release 6.0 (1987), 8-byte real examples:
    # 0x41 10 00 00 00 00 00 00 = 1.0 ; 0x41 A0 00 00 00 00 00 00 = 10.0 ; 0xC1 10 ... = -1.0
    raw = np.frombuffer(bytes.fromhex("4110000000000000" "41A0000000000000" "C110000000000000"), np.uint8)
    assert np.array_equal(_real8(raw.reshape(3, 8)), [1.0, 10.0, -1.0])
    # the test writer's independent encoder round-trips through the reader's decoder
    for x in (1e-3, 1e-9, 2.5e-10, 90.0, 0.5, 123456.789):
        got = _real8(np.frombuffer(real8(x), np.uint8).reshape(1, 8))[0]
        assert got == pytest.approx(x, rel=1e-15)


def test_flat_file_from_independent_writer(tmp_path):
    fins = [[(x + a, y + b) for a, b in FIN] for x, y in [(0, 0), (325, 0), (0, 325)]]
    tri = [(0, 0), (300, 0), (0, 400)]
    data = lib_bytes([("TOP", [boundary(1, 0, f) for f in fins] + [boundary(1, 2, tri), boundary(5, 0, tri, False)])])
    p = tmp_path / "flat.gds"
    p.write_bytes(data)
    fp = read_mask(p)
    assert fp.db_unit_nm == pytest.approx(1.0, rel=1e-15) and fp.user_unit_m == pytest.approx(1e-6, rel=1e-15)
    want = sorted([canon(1, 0, f) for f in fins] + [canon(1, 2, tri), canon(5, 0, tri)])
    assert polys_of(fp) == want
    # layer filter: by (layer, datatype) and by layer
    assert polys_of(read_mask(p, layers=[(1, 2)])) == [canon(1, 2, tri)]
    assert len(polys_of(read_mask(p, layers=[1]))) == 4


def test_hierarchy_resolved_exactly(hier_file):
    fp = read_mask(hier_file)
    want = []
    # PAIR placed at (0, 5000) reflected about x: FIN at (0,0) and FIN rotated 90 deg at (1000, 0), then y -> -y
    pair = [(x, y) for x, y in FIN] + []
    rot = [(-y + 1000, x) for x, y in FIN]
    want.append(canon(1, 0, [(x, -y + 5000) for x, y in pair]))
    want.append(canon(1, 0, [(x, -y + 5000) for x, y in rot]))
    # AREF 3 x 2: column step (400, 0), row step (0, 500) from (0, -3000)
    for i in range(3):
        for j in range(2):
            want.append(canon(1, 0, [(x + 400 * i, y - 3000 + 500 * j) for x, y in FIN]))
    want.append(canon(2, 0, [(-10000, -10000), (10000, -10000), (10000, 10000), (-10000, 10000)]))
    assert polys_of(fp) == sorted(want)


def test_hierarchy_matches_gdstk(hier_file):
    import gdstk

    lib = gdstk.read_gds(str(hier_file), unit=1e-9)
    top = lib.top_level()[0].copy("FLATCOPY", deep_copy=True).flatten()
    ref = sorted(canon(p.layer, p.datatype, np.rint(p.points).astype(int).tolist()) for p in top.polygons)
    assert polys_of(read_mask(hier_file)) == ref


def test_paths_outlined(tmp_path):
    data = lib_bytes([("TOP", [path(7, 100, [(0, 0), (1000, 0), (1000, 800)], pathtype=0),
                               path(7, 40, [(0, 2000), (500, 2000)], pathtype=2)])])
    p = tmp_path / "path.gds"
    p.write_bytes(data)
    fp = read_mask(p)
    import shapely

    areas = sorted(abs(shapely.Polygon(fp.xy_db[fp.start[k]:fp.start[k + 1]]).area) for k in range(fp.count))
    # flush ends with a mitred corner: (1000 + 50) * 100 + (800 - 50) * 100 ; half-width extended ends: 540 * 40
    assert areas == [540 * 40, 1050 * 100 + 750 * 100]


@pytest.mark.parametrize("fmt", ["gds", "oas"])
def test_gdstk_written_files_read_back(tmp_path, fmt):
    import gdstk

    rng = np.random.default_rng(5)
    lib = gdstk.Library(unit=1e-6, precision=1e-9)
    c = lib.new_cell("TOP")
    pts = rng.integers(-5000, 5000, size=(50, 2))
    for k, (x, y) in enumerate(pts):
        c.add(gdstk.rectangle((x / 1000, y / 1000), ((x + 100 + k) / 1000, (y + 40) / 1000), layer=1 + k % 2))
    sub = lib.new_cell("SUB")
    sub.add(gdstk.Polygon([(0, 0), (0.2, 0), (0.1, 0.3)], layer=4))
    r = gdstk.Reference(sub, (1, 1))
    r.repetition = gdstk.Repetition(4, 3, spacing=(0.5, 0.7))
    c.add(r)
    f = tmp_path / f"lib.{fmt}"
    getattr(lib, f"write_{fmt}")(str(f))
    fp = read_mask(f)
    flatc = c.copy("F", deep_copy=True).flatten()
    polys = []
    for p in flatc.polygons:
        offs = p.repetition.get_offsets() if p.repetition.size else np.zeros((1, 2))
        for o in offs:
            polys.append(canon(p.layer, p.datatype, np.rint((p.points + o) * 1000).astype(int).tolist()))
    assert polys_of(fp) == sorted(polys)
    assert fp.count == 50 + 12


def test_mask_info(hier_file):
    info = mask_info(hier_file)
    assert info["format"] == "GDSII" and info["top_cells"] == ["TOP"]
    assert info["polygons"] == 9 and {(r["layer"], r["datatype"]): r["polygons"] for r in info["layers"]} == {
        (1, 0): 8, (2, 0): 1}
    assert info["bbox_db"] == [-10000, -10000, 10000, 10000]
    assert len(info["sha256"]) == 64 and info["db_unit_m"] == pytest.approx(1e-9)
    assert mask_info(hier_file) == info  # deterministic


# ------------------------------------------------------------------------------------------------------------------
# Hostile input
# ------------------------------------------------------------------------------------------------------------------

def _bad(tmp_path, data: bytes, match: str, **kw):
    p = tmp_path / "bad.gds"
    p.write_bytes(data)
    with pytest.raises(MaskReadError, match=match):
        read_mask(p, **kw)


def test_hostile_inputs(tmp_path, hier_file):
    good = hier_file.read_bytes()
    _bad(tmp_path, good[: len(good) // 2], "truncated")
    _bad(tmp_path, b"", "not a GDSII or OASIS")
    _bad(tmp_path, b"\x89PNG\r\n\x1a\n" + bytes(100), "not a GDSII or OASIS")
    _bad(tmp_path, good[:6] + b"\x00\x03" + good[8:], "bad record length")  # odd length of BGNLIB
    # cycle A -> B -> A, and self reference
    _bad(tmp_path, lib_bytes([("A", [sref("B", 0, 0)]), ("B", [sref("A", 0, 0), boundary(1, 0, FIN)]),
                              ("T", [sref("A", 0, 0)])]), "cycle")
    _bad(tmp_path, lib_bytes([("A", [sref("A", 0, 0)])]), "cycle")
    _bad(tmp_path, lib_bytes([("A", [sref("NOPE", 0, 0)])]), "undefined structure 'NOPE'")
    # a billion placements: rejected by counting before anything is expanded
    chain = [("L0", [boundary(1, 0, FIN)])]
    for k in range(1, 4):
        chain.append((f"L{k}", [aref(f"L{k - 1}", 32767, 32767, (0, 0), (32767, 0), (0, 32767))]))
    t0 = time.perf_counter()
    _bad(tmp_path, lib_bytes(chain), "exceed the limit")
    assert time.perf_counter() - t0 < 5
    deep = [("D0", [boundary(1, 0, FIN)])] + [(f"D{k}", [sref(f"D{k - 1}", 1, 0)]) for k in range(1, 80)]
    _bad(tmp_path, lib_bytes(deep), "nested deeper")
    _bad(tmp_path, lib_bytes([("T", [boundary(1, 0, FIN)] * 10)]), "exceed the limit max_elements", max_elements=5)
    # XY with an odd number of bytes for its type
    bad_xy = rec(0x08, 0) + rec(0x0D, 2, i16(1)) + rec(0x0E, 2, i16(0)) + rec(0x10, 3, i32(0, 0, 1, 0, 1)) + rec(
        0x11, 0)
    _bad(tmp_path, lib_bytes([("T", [bad_xy])]), "XY record")
    # missing ENDEL: next element starts inside
    no_endel = boundary(1, 0, FIN)[:-4]
    _bad(tmp_path, lib_bytes([("T", [no_endel, boundary(1, 0, FIN)])]), "not closed by ENDEL")


def test_limits_bound_memory_and_time(tmp_path):
    # 2 x 32767 x 32767 placements of a cell: counted, not allocated
    data = lib_bytes([("F", [boundary(1, 0, FIN)]),
                      ("T", [aref("F", 32767, 32767, (0, 0), (32767 * 300, 0), (0, 32767 * 300))] * 2)])
    t0 = time.perf_counter()
    _bad(tmp_path, data, "exceed the limit")
    assert time.perf_counter() - t0 < 5


_VALID = lib_bytes([
    ("FIN", [boundary(1, 0, FIN)]),
    ("TOP", [sref("FIN", 0, 0, angle=30.0, mag=2.0), aref("FIN", 2, 2, (0, 0), (800, 0), (0, 800)),
             boundary(1, 0, FIN), boundary(1, 0, [(p[0] + 400, p[1]) for p in FIN]),
             path(2, 50, [(0, 0), (300, 300)]), text(3, 0, 0, "x")]),
])


@settings(max_examples=300, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(st.data())
def test_fuzz_mutated_bytes(tmp_path, data):
    """Random byte edits, insertions and truncations: a MaskReadError or a valid result, quickly, nothing else."""
    buf = bytearray(_VALID)
    n_edits = data.draw(st.integers(1, 6))
    for _ in range(n_edits):
        op = data.draw(st.sampled_from(["set", "insert", "delete", "truncate"]))
        pos = data.draw(st.integers(0, max(0, len(buf) - 1)))
        if op == "set" and buf:
            buf[pos] = data.draw(st.integers(0, 255))
        elif op == "insert":
            buf[pos:pos] = bytes(data.draw(st.lists(st.integers(0, 255), min_size=1, max_size=8)))
        elif op == "delete" and buf:
            del buf[pos:pos + data.draw(st.integers(1, 8))]
        elif op == "truncate":
            del buf[pos:]
    p = tmp_path / "fuzz.gds"
    p.write_bytes(bytes(buf))
    t0 = time.perf_counter()
    try:
        fp = read_mask(p, max_elements=100_000, max_vertices=1_000_000)
    except MaskReadError:
        pass
    else:
        assert isinstance(fp, FlatPolygons)
        assert fp.start[-1] == fp.xy_db.shape[0] and fp.start.shape[0] == fp.count + 1
        assert np.all(np.diff(fp.start) >= 0)
    assert time.perf_counter() - t0 < 2.0


def _mutated_oasis_files(tmp_path, wanted):
    """Small OASIS files mutated the same way each run (random.Random(1)); returns {index: path} for ``wanted``."""
    import random

    import gdstk

    lib = gdstk.Library(unit=1e-6, precision=1e-9)
    cell = lib.new_cell("A")
    for i in range(50):
        cell.add(gdstk.rectangle((i, 0), (i + 0.5, 1)))
    top = lib.new_cell("T")
    top.add(gdstk.Reference(cell, (0, 0)))
    lib.write_oas(str(tmp_path / "small.oas"))
    data = (tmp_path / "small.oas").read_bytes()
    rng = random.Random(1)
    out = {}
    for k in range(max(wanted) + 1):
        b = bytearray(data)
        for _ in range(rng.randint(1, 8)):
            b[rng.randrange(len(b))] = rng.randrange(256)
        if rng.random() < 0.3:
            b = b[:rng.randrange(len(b))]
        if k in wanted:
            out[k] = tmp_path / f"mut{k}.oas"
            out[k].write_bytes(bytes(b))
    return out


def test_hostile_oasis_never_crashes_the_interpreter(tmp_path):
    # Mutations 9, 49 and 68 of this fixed sequence crashed gdstk's C++ OASIS reader (signal) when read directly
    # (measured here); read_mask now reads OASIS with metalay's own pure-Python reader: every one is a one-line
    # MaskReadError naming the byte offset (or a valid result), and this process lives on.
    files = _mutated_oasis_files(tmp_path, {0, 1, 2, 9, 49, 68})
    outcomes = {}
    for k, path in sorted(files.items()):
        try:
            read_mask(path)
            outcomes[k] = "ok"
        except MaskReadError as exc:
            outcomes[k] = str(exc)
    for k in (9, 49, 68):
        assert outcomes[k] != "ok" and "OASIS" in outcomes[k]
    assert all("OASIS byte" in outcomes[k] and "\n" not in outcomes[k] for k in (9, 49, 68))
