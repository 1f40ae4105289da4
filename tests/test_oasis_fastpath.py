"""The OASIS reader's fast path (runs of POLYGON records parsed at once, ``metalay/io/_oasis_batch.py``) must give
the same polygons and, on a damaged file, the same one-line error as the record-by-record parser.

The oracle is the record-by-record parser itself (checked against gdstk and against SEMI P39 worked records in
tests/test_oasis_codec.py and tests/test_oasis_stream.py). The files: a flat mask of fins as the compile writes
it (shape groups with repetitions), uncompressed and unvalidated so that seeded mutations reach the records
(tests/hostile_corpus.py ``mutate``); every file is read twice, fast path on and off, in one child process with a
capped address space (a hostile file must not take the test process down).
"""

import json
import random
import subprocess
import sys
from pathlib import Path

import numpy as np

import hostile_corpus as hc

HERE = Path(__file__).resolve().parent
MUTATIONS = 400

_CHILD = r"""
import hashlib, json, resource, sys
resource.setrlimit(resource.RLIMIT_AS, (1 << 31, 1 << 31))
import numpy as np
from metalay.errors import MetalayError
from metalay.io import oasis_read
from metalay.io.gdsread import read_mask
from metalay.io.stream_read import iter_mask_chunks

def digest(parts):
    h = hashlib.sha256()
    for get in (lambda p: p.layer, lambda p: p.datatype, lambda p: np.diff(p.start), lambda p: p.xy_db):
        h.update(np.concatenate([np.asarray(get(p), np.int64).ravel() for p in parts] or [np.zeros(0, np.int64)])
                 .tobytes())
    return h.hexdigest()[:16]

def outcome(fn):
    try:
        return "ok " + fn()
    except MetalayError as exc:
        return "refused " + str(exc)
    except Exception as exc:
        return f"internal {type(exc).__name__}: {exc}"

real = oasis_read._Parser.fast_polygons
out = {}
for path in sys.argv[1:]:
    row = []
    for fast in (True, False):
        oasis_read._Parser.fast_polygons = real if fast else (lambda self, cur, at: False)
        row.append(outcome(lambda: digest([read_mask(path)])))
        row.append(outcome(lambda: digest(list(iter_mask_chunks(path, chunk_polygons=700)))))
    out[path] = row
print(json.dumps(out))
"""


def _fins_oasis(path: Path) -> None:
    """About 2500 fins of eight rotations on a 325 nm lattice, as the compile groups them (an invented layout)."""
    from metalay.io.oasis_write import OasisStream
    from metalay.mask.layout import group_shapes

    rng = np.random.default_rng(7)
    j, i = np.mgrid[0:50, 0:50]
    centres = np.column_stack([i.ravel(), j.ravel()]).astype(np.int64) * 325
    theta = rng.integers(0, 8, centres.shape[0]) * np.pi / 8
    base = np.array([[-110, -40], [110, -40], [110, 40], [-110, 40]], float)
    c, s = np.cos(theta)[:, None], np.sin(theta)[:, None]
    offsets = np.rint(np.stack([c * base[:, 0] - s * base[:, 1], s * base[:, 0] + c * base[:, 1]], -1))
    offsets = offsets.astype(np.int32)
    with OasisStream(path, "TOP", compression_level=0, validation="none") as oas:
        for sel in np.array_split(np.arange(centres.shape[0]), 4):  # four tiles, as the compile writes them
            g = group_shapes(offsets[sel])
            oas.add_shape_groups(1, 0, g.shapes_db, g.shape_of_site, centres[sel])


def test_fast_path_gives_the_record_parser_result_on_intact_and_damaged_files(tmp_path):
    seed_path = tmp_path / "fins.oas"
    _fins_oasis(seed_path)
    data = seed_path.read_bytes()
    rng = random.Random(20261203)
    paths = [seed_path]
    for k in range(MUTATIONS):
        p = tmp_path / f"m{k:04d}.oas"
        p.write_bytes(hc.mutate(data, rng))
        paths.append(p)
    proc = subprocess.run([sys.executable, "-c", _CHILD, *map(str, paths)], capture_output=True, text=True,
                          timeout=600, cwd=HERE)
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    # the intact file: read, and identical both ways (whole read and streamed chunks)
    first = out[str(seed_path)]
    assert first[0].startswith("ok ") and len(set(first)) == 1, first
    differ = {p: row for p, row in out.items() if row[:2] != row[2:]}
    assert differ == {}  # fast path on == off, result or error, for every file
    internal = {p: row for p, row in out.items() if any(r.startswith("internal") for r in row)}
    assert internal == {}
    outcomes = [row[0].split(" ", 1)[0] for row in out.values()]
    assert outcomes.count("refused") > 0 and outcomes.count("ok") > 1  # both paths exercised
