"""A seeded corpus of hostile and mutated GDSII/OASIS files, and a runner that reads each one in its own capped
process (shared by ``tests/test_fuzz.py`` and ``bench/soak_hostile.py``; it shares no code with metalay's readers).

GDSII files are built from the record descriptions of the Calma GDSII Stream Format Manual, Release 6.0 (1987)
(2-byte big-endian record length, record type, data type; 2- and 4-byte big-endian integers; 8-byte excess-64
reals); OASIS files with ``tests/oasis_minimal.py`` (written from SEMI P39).

The runner starts one Python process with metalay imported and an address-space cap (``RLIMIT_AS``), which forks
one child per file: the child reads the file with ``read_mask`` and checks the polygons it got against a set of
design rules, reports one line and exits; the parent collects the child's exit status, CPU time and peak resident
memory (``wait4``). A crash (a signal), a hang (``SIGALRM`` after ``timeout_s``), an internal error (any exception
that is not a ``MetalayError``) and a clean refusal are told apart per file.
"""

from __future__ import annotations

import json
import math
import os
import random
import struct
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import oasis_minimal as om  # noqa: E402

# ------------------------------------------------------------------------------------------------------------------
# GDSII records (Calma GDSII Stream Format Manual, Release 6.0: record types HEADER 00, BGNLIB 01, LIBNAME 02,
# UNITS 03, ENDLIB 04, BGNSTR 05, STRNAME 06, ENDSTR 07, BOUNDARY 08, PATH 09, SREF 0A, AREF 0B, TEXT 0C, LAYER 0D,
# DATATYPE 0E, WIDTH 0F, XY 10, ENDEL 11, SNAME 12, COLROW 13, TEXTTYPE 16, STRING 19, STRANS 1A, MAG 1B,
# ANGLE 1C, PATHTYPE 21, BOX 2D, BOXTYPE 2E)
# ------------------------------------------------------------------------------------------------------------------


def rec(rtype: int, dtype: int, payload: bytes = b"") -> bytes:
    if len(payload) % 2:
        payload += b"\0"
    return struct.pack(">HBB", 4 + len(payload), rtype, dtype) + payload


def real8(x: float) -> bytes:
    if x == 0:
        return bytes(8)
    sign = 0x80 if x < 0 else 0
    _, e = math.frexp(abs(x))
    e16 = math.ceil(e / 4)
    mant = int(round(abs(x) / 16.0 ** e16 * 2 ** 56))
    return bytes([sign | (e16 + 64)]) + mant.to_bytes(7, "big")


def i16(*v) -> bytes:
    return struct.pack(f">{len(v)}h", *v)


def i32(*v) -> bytes:
    return struct.pack(f">{len(v)}i", *v)


def gds(structures, db_in_user=1e-3, db_m=1e-9) -> bytes:
    """A library of ``structures`` = [(name, [element bytes, ...]), ...]."""
    out = rec(0x00, 2, i16(600)) + rec(0x01, 2, i16(*[0] * 12)) + rec(0x02, 6, b"LIB")
    out += rec(0x03, 5, real8(db_in_user) + real8(db_m))
    for name, elements in structures:
        out += rec(0x05, 2, i16(*[0] * 12)) + rec(0x06, 6, name.encode()) + b"".join(elements) + rec(0x07, 0)
    return out + rec(0x04, 0)


def boundary(layer, datatype, pts) -> bytes:
    pts = list(pts) + [pts[0]]
    return (rec(0x08, 0) + rec(0x0D, 2, i16(layer)) + rec(0x0E, 2, i16(datatype))
            + rec(0x10, 3, i32(*[c for p in pts for c in p])) + rec(0x11, 0))


def box(layer, x0, y0, x1, y1) -> bytes:
    pts = [(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)]
    return (rec(0x2D, 0) + rec(0x0D, 2, i16(layer)) + rec(0x2E, 2, i16(0))
            + rec(0x10, 3, i32(*[c for p in pts for c in p])) + rec(0x11, 0))


def path(layer, width, pts, pathtype=0) -> bytes:
    return (rec(0x09, 0) + rec(0x0D, 2, i16(layer)) + rec(0x0E, 2, i16(0)) + rec(0x21, 2, i16(pathtype))
            + rec(0x0F, 3, i32(width)) + rec(0x10, 3, i32(*[c for p in pts for c in p])) + rec(0x11, 0))


def text(layer, x, y, string) -> bytes:
    return (rec(0x0C, 0) + rec(0x0D, 2, i16(layer)) + rec(0x16, 2, i16(0)) + rec(0x10, 3, i32(x, y))
            + rec(0x19, 6, string) + rec(0x11, 0))


def sref(name, x, y, angle=None, mag=None, reflect=False) -> bytes:
    out = rec(0x0A, 0) + rec(0x12, 6, name.encode())
    if angle is not None or mag is not None or reflect:
        out += rec(0x1A, 1, struct.pack(">H", 0x8000 if reflect else 0))
        if mag is not None:
            out += rec(0x1B, 5, real8(mag))
        if angle is not None:
            out += rec(0x1C, 5, real8(angle))
    return out + rec(0x10, 3, i32(x, y)) + rec(0x11, 0)


def aref(name, cols, rows, origin, pcol, prow) -> bytes:
    return (rec(0x0B, 0) + rec(0x12, 6, name.encode()) + rec(0x13, 2, i16(cols, rows))
            + rec(0x10, 3, i32(*origin, *pcol, *prow)) + rec(0x11, 0))


FIN = [(-125, -42), (125, -42), (125, 42), (-125, 42)]


def circle_points(n: int, r: float):
    return [(int(round(r * math.cos(2 * math.pi * k / n))), int(round(r * math.sin(2 * math.pi * k / n))))
            for k in range(n)]


# ------------------------------------------------------------------------------------------------------------------
# Seeds (valid files) and hostile cases
# ------------------------------------------------------------------------------------------------------------------

def gds_seeds() -> dict[str, bytes]:
    """Small valid GDSII files covering every element kind the reader decodes."""
    hier = gds([("FIN", [boundary(1, 0, FIN)]),
                ("PAIR", [sref("FIN", 0, 0), sref("FIN", 1000, 0, angle=90.0)]),
                ("TOP", [sref("PAIR", 0, 5000, reflect=True), aref("FIN", 3, 2, (0, -3000), (1200, -3000),
                                                                    (0, -2000)),
                         sref("FIN", 0, 9000, angle=30.0, mag=2.0), box(2, -10000, -10000, 10000, 10000),
                         text(3, 0, 0, b"label")])])
    flat = gds([("TOP", [boundary(1, k % 3, [(x + 400 * k, y) for x, y in FIN]) for k in range(20)]
                 + [boundary(1, 0, circle_points(64, 3000))]
                 + [boundary(2, 0, [(0, 0), (1000, 0), (1000, 1000), (600, 1000), (600, 400), (400, 400),
                                    (400, 1000), (0, 1000)])])])
    paths = gds([("TOP", [path(4, 50 + 10 * t, [(0, 1000 * t), (300, 1000 * t + 300), (900, 1000 * t)], t)
                          for t in (0, 1, 2)] + [path(4, 0, [(0, 0), (5, 5)])])])
    return {"hier.gds": hier, "flat.gds": flat, "paths.gds": paths}


def oasis_seeds() -> dict[str, bytes]:
    """Small valid OASIS files: polygons with repetitions, placements, a CBLOCK, a CRC32 signature."""
    u, g = om.u, om.g
    tri = [(0, 0), (40, 0), (10, 30)]
    quad = [(0, 0), (10, 3), (4, 20), (-2, 11)]
    body = om.cell(1) + om.polygon(4, 0, tri) + om.cell(0)
    reps = [u(1) + u(1) + u(0) + u(500) + u(700), u(2) + u(2) + u(300), u(8) + u(0) + u(1) + g(300, 100) + g(-100, 400),
            u(10) + u(1) + g(1001, 500) + g(999, -3500)]
    for k, rep in enumerate(reps):
        body += om.polygon(10 + k, 1, quad, rep) + om.placement(1, 1000 * k, -1000 * k, rep)
    plain = om.oasis(body, (b"TOP", b"SUB"))
    packed = om.oasis(om.cblock(body), (b"TOP", b"SUB"), validation=1)
    summed = om.oasis(body, (b"TOP", b"SUB"), validation=2, tables_in_start=True, implicit_names=False)
    return {"plain.oas": plain, "cblock_crc.oas": packed, "sum.oas": summed}


def hostile_cases() -> dict[str, tuple[bytes, str | None]]:
    """name -> (bytes, expected substring of the refusal, or None when a correct read is allowed)."""
    u, g = om.u, om.g
    tri = [(0, 0), (5, 0), (0, 5)]
    cases: dict[str, tuple[bytes, str | None]] = {}
    leaf = ("A", [boundary(1, 0, FIN)])
    # 9999 x 9999 = 99,980,001 placements (just under the element limit) of a one-polygon cell: 258 bytes
    cases["aref9999.gds"] = (gds([leaf, ("T", [aref("A", 9999, 9999, (0, 0), (9999 * 300, 0),
                                                      (0, 9999 * 300))])]), "memory budget")
    # AREFs of an empty cell, nested: 1e18 placements of nothing (counted, never expanded: an empty result)
    cases["aref_empty.gds"] = (gds([("E", []), ("M", [aref("E", 32767, 32767, (0, 0), (32767, 0), (0, 32767))]),
                                    ("T", [aref("M", 32767, 32767, (0, 0), (32767, 0), (0, 32767))])]), None)
    # 2**26 polygons through 26 nested structures, each placing the next twice
    chain = [("C26", [boundary(1, 0, FIN)])] + [(f"C{k}", [sref(f"C{k + 1}", 0, 0), sref(f"C{k + 1}", 7, 0)])
                                                for k in range(25, -1, -1)]
    cases["fanout2_26.gds"] = (gds(chain), "memory budget")
    cases["aref32767x2.gds"] = (gds([leaf, ("T", [aref("A", 32767, 32767, (0, 0), (32767, 0), (0, 32767))] * 2)]),
                                "max_elements")
    deep = [("D0", [boundary(1, 0, FIN)])] + [(f"D{k}", [sref(f"D{k - 1}", 1, 0)]) for k in range(1, 80)]
    cases["deep80.gds"] = (gds(deep), "nested deeper than 64")
    cases["cycle.gds"] = (gds([("A", [sref("B", 0, 0)]), ("B", [sref("A", 0, 0), boundary(1, 0, FIN)]),
                               ("T", [sref("A", 0, 0)])]), "cycle")
    cases["undefined.gds"] = (gds([("T", [sref("NOPE", 0, 0)])]), "undefined structure")
    # one 8191-point polygon (the GDSII maximum: 8190 vertices plus the closing one), and a non-convex star
    cases["circle8190.gds"] = (gds([("T", [boundary(1, 0, circle_points(8190, 500_000))])]), None)
    star = [(int(round((400_000 if k % 2 else 300_000) * math.cos(math.pi * k / 4095))),
             int(round((400_000 if k % 2 else 300_000) * math.sin(math.pi * k / 4095)))) for k in range(8190)]
    cases["star8190.gds"] = (gds([("T", [boundary(1, 0, star)])]), None)
    # 65,536 overlapping boxes placed by references (1 nm apart), and 65,536 boxes stacked on one place
    cases["overlap65536.gds"] = (gds([("B", [box(1, 0, 0, 1000, 1000)]),
                                      ("T", [aref("B", 256, 256, (0, 0), (256, 0), (0, 256))])]), None)
    cases["stack65536.gds"] = (gds([("B", [box(1, 0, 0, 1000, 1000)]),
                                    ("T", [aref("B", 256, 256, (0, 0), (0, 0), (0, 0))])]), None)
    # OASIS: the same fan-outs through repetitions and placements, CBLOCK bombs, huge coordinates
    cases["rep32767.oas"] = (om.oasis(om.cell(0) + om.polygon(1, 0, tri, u(1) + u(32765) + u(32765) + u(10)
                                                              + u(10))), "max_elements")
    cases["rep9000.oas"] = (om.oasis(om.cell(0) + om.polygon(1, 0, tri, u(1) + u(8998) + u(8998) + u(10)
                                                             + u(10))), "memory budget")
    cases["place32767.oas"] = (om.oasis(om.cell(1) + om.polygon(1, 0, tri) + om.cell(0) + om.placement(
        1, 0, 0, u(1) + u(32765) + u(32765) + u(10) + u(10)), (b"TOP", b"LEAF")), "max_elements")
    body = om.cell(26) + om.polygon(1, 0, tri)
    for k in range(25, -1, -1):
        body += om.cell(k) + om.placement(k + 1, 0, 0, u(2) + u(0) + u(7))
    cases["fanout2_26.oas"] = (om.oasis(body, tuple(f"C{k}".encode() for k in range(27))), "memory budget")
    cases["cblock_huge.oas"] = (om.oasis(om.cell(0) + om.cblock(b"\x00" * 1000, declared=1 << 40)), "memory budget")
    cases["cblock_lie.oas"] = (om.oasis(om.cell(0) + om.cblock(bytes(10_000_000), declared=100, level=9)),
                               "inflates to more")
    cases["rep_declared.oas"] = (om.oasis(om.cell(0) + om.polygon(1, 0, tri, u(10) + u(2 ** 60) + g(1, 0))),
                                 "bytes left")
    cases["coords.oas"] = (om.oasis(om.cell(0) + om.polygon(1, 0, [(0, 0), (2 ** 53, 0), (0, 5)])), "2\\*\\*52")
    return cases


# ------------------------------------------------------------------------------------------------------------------
# Mutations
# ------------------------------------------------------------------------------------------------------------------

_EXTREMES16 = (0, 1, 2, 3, 0x7FFF, 0x8000, 0xFFFF, 0x0100, 0x2000)
_EXTREMES32 = (0, 1, 0x7FFFFFFF, 0x80000000, 0xFFFFFFFF, 0x00010000, 1 << 20)


def mutate(data: bytes, rng: random.Random) -> bytes:
    """1 to 6 edits: set a byte, write an extreme 16- or 32-bit integer, insert, delete or duplicate a slice, or
    truncate; never the identity."""
    src = bytearray(data)
    while bytes(src) == data:
        for _ in range(rng.randint(1, 6)):
            op = rng.random()
            pos = rng.randrange(len(src)) if src else 0
            if op < 0.35 and src:
                src[pos] = rng.randrange(256)
            elif op < 0.5 and len(src) > pos + 2:
                src[pos:pos + 2] = rng.choice(_EXTREMES16).to_bytes(2, "big")
            elif op < 0.6 and len(src) > pos + 4:
                src[pos:pos + 4] = rng.choice(_EXTREMES32).to_bytes(4, "big")
            elif op < 0.7:
                src[pos:pos] = bytes(rng.randrange(256) for _ in range(rng.randint(1, 8)))
            elif op < 0.8 and src:
                del src[pos:pos + rng.randint(1, 16)]
            elif op < 0.9 and src:
                n = rng.randint(4, 64)
                src[pos:pos] = src[pos:pos + n]
            elif src:
                del src[rng.randrange(len(src)):]
    return bytes(src)


def build_corpus(folder: Path, *, mutations: int, seed: int = 20240613) -> dict[str, str | None]:
    """Write the hostile cases and ``mutations`` seeded mutations of the seeds into ``folder``.

    Returns name -> expected refusal substring (None: any clean outcome is allowed).
    """
    folder.mkdir(parents=True, exist_ok=True)
    expect: dict[str, str | None] = {}
    for name, (data, exp) in hostile_cases().items():
        (folder / f"h_{name}").write_bytes(data)
        expect[f"h_{name}"] = exp
    seeds = sorted({**gds_seeds(), **oasis_seeds()}.items())
    for name, data in seeds:
        (folder / f"s_{name}").write_bytes(data)
        expect[f"s_{name}"] = None
    # the hostile cases are mutated too (a changed count or name in a bomb must be refused just as well)
    seeds += sorted((f"h-{name}", data) for name, (data, _) in hostile_cases().items() if len(data) < 100_000)
    rng = random.Random(seed)
    for k in range(mutations):
        name, data = seeds[k % len(seeds)]
        stem, ext = name.rsplit(".", 1)
        fname = f"m_{k:05d}_{stem}.{ext}"
        (folder / fname).write_bytes(mutate(data, rng))
        expect[fname] = None
    return expect


# ------------------------------------------------------------------------------------------------------------------
# The capped fork server
# ------------------------------------------------------------------------------------------------------------------

_SERVER = r"""
import json, os, resource, signal, sys, time, traceback
cap, timeout_s = int(sys.argv[1]), int(sys.argv[2])
resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
from metalay.checks.rules import LayerRules, RuleSet, check_mask
from metalay.errors import MetalayError
from metalay.io.gdsread import read_mask

def work(path):
    flat = read_mask(path)
    pairs = sorted(set(zip(flat.layer.tolist(), flat.datatype.tolist())))[:4]
    g = 2 * flat.db_unit_nm
    rules = RuleSet("fuzz", tuple(LayerRules(l, d, min_width_nm=20.0, min_spacing_nm=20.0, forbid_overlap=True,
                                             min_area_nm2=100.0, min_notch_nm=20.0, min_hole_area_nm2=1000.0,
                                             max_vertices=8190, grid_nm=g, min_angle_deg=10.0,
                                             check_validity=True) for l, d in pairs))
    report = check_mask(flat, rules)
    return f"ok {flat.count} polygons, {report.total_violations} violations"

for line in sys.stdin:
    path = line.rstrip("\n")
    r, w = os.pipe()
    t0 = time.perf_counter()
    pid = os.fork()
    if pid == 0:
        os.close(r)
        signal.alarm(timeout_s)
        try:
            res = {"outcome": "ok", "detail": work(path)}
        except MetalayError as exc:
            res = {"outcome": "refused", "detail": str(exc)[:600], "exit_code": exc.exit_code}
        except BaseException as exc:
            res = {"outcome": "internal", "detail": f"{type(exc).__name__}: {exc}"[:600],
                   "trace": traceback.format_exc()[-1500:]}
        os.write(w, json.dumps(res).encode())
        os._exit(0)
    os.close(w)
    chunks = []
    while True:
        b = os.read(r, 1 << 16)
        if not b:
            break
        chunks.append(b)
    os.close(r)
    _, status, ru = os.wait4(pid, 0)
    wall = time.perf_counter() - t0
    try:
        res = json.loads(b"".join(chunks).decode())
    except ValueError:
        res = {}
    if os.WIFSIGNALED(status):
        sig = os.WTERMSIG(status)
        res = {"outcome": "timeout" if sig == signal.SIGALRM else "crash", "detail": f"signal {sig}"}
    elif os.WEXITSTATUS(status) != 0 or not res:
        res = {"outcome": "crash", "detail": f"exit status {os.WEXITSTATUS(status)}"}
    res.update(name=os.path.basename(path), cpu_s=ru.ru_utime + ru.ru_stime, wall_s=wall,
               maxrss_mb=ru.ru_maxrss / 1024.0)
    sys.stdout.write(json.dumps(res) + "\n")
    sys.stdout.flush()
"""


def run_corpus(paths, *, cap_bytes: int = 1 << 30, timeout_s: int = 60, on_result=None) -> list[dict]:
    """Read every file of ``paths`` in its own forked process under an address-space cap; one dict per file.

    Each dict has ``name``, ``outcome`` (ok, refused, internal, crash, timeout), ``detail``, ``cpu_s``, ``wall_s``
    and ``maxrss_mb`` (the child's peak resident memory, which includes the interpreter and metalay it inherits).
    """
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", PYTHONPATH=str(HERE.parent))
    proc = subprocess.Popen([sys.executable, "-c", _SERVER, str(cap_bytes), str(timeout_s)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, env=env, cwd=str(HERE.parent))
    out = []
    paths = [str(p) for p in paths]

    def feed():
        for p in paths:
            proc.stdin.write(p + "\n")
        proc.stdin.close()

    import threading

    feeder = threading.Thread(target=feed, daemon=True)
    feeder.start()
    for line in proc.stdout:
        res = json.loads(line)
        out.append(res)
        if on_result is not None:
            on_result(res)
    proc.wait()
    feeder.join()
    if proc.returncode != 0 or len(out) != len(paths):
        raise RuntimeError(f"fork server ended with status {proc.returncode} after {len(out)} of {len(paths)} files")
    return out
