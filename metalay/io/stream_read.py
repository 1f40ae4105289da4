"""Read a mask as a stream of polygon chunks, so a check never holds the whole flattened mask.

:func:`iter_mask_chunks` yields :class:`~metalay.io.gdsread.FlatPolygons` chunks whose concatenation is exactly what
:func:`~metalay.io.gdsread.read_mask` returns (same polygons, same order, same database unit). It runs the same
record walk, hierarchy checks and count limits as the whole read, but never allocates the flattened output:

* GDSII runs of identical BOUNDARY elements (the flat masks metalay writes) are decoded a chunk at a time from the
  memory-mapped file, whose pages are released from the resident set once decoded (``madvise(MADV_DONTNEED)``:
  they stay in the page cache); what stays in memory is the walk's per-element table (layer, datatype and two
  flags: about 10 bytes per element), kept as one value per run when the run is uniform (one layer, every polygon
  closed: the masks the compile writes) and not kept for runs with nothing on the wanted layers;
* placed cells are expanded a block of placements at a time (the placements' affine maps are held: 48 bytes each);
* OASIS files are read in two passes by :mod:`metalay.io._oasis_stream`: a survey that parses and checks the
  whole file with :mod:`metalay.io.oasis_read`'s parser but expands nothing (repetitions counted, a small table
  per cell kept), then each cell holding polygons parsed again from its CELL record and expanded a bounded piece
  at a time (a few MB of records, a repetition a slice of positions at a time, placements composed in blocks);
  what is held is the per-cell table, one CBLOCK and one record's decoded points or positions, not the polygons.

The memory-budget admission of :func:`read_mask` (the size of the flattened result) does not apply here; the
element, vertex and depth limits do.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator

import numpy as np

from metalay.errors import MaskReadError
from metalay.io import _oasis_stream
from metalay.io.gdsread import (
    DEFAULT_MAX_DEPTH,
    DEFAULT_MAX_ELEMENTS,
    DEFAULT_MAX_VERTICES,
    FlatPolygons,
    _cell_geometry,
    _decode_run,
    _flat_sizes,
    _flat_totals,
    _instance_counts,
    _make_filter,
    _nm_from_m,
    _parse,
    _placements,
    _sniff,
    _topology,
)

__all__ = ["iter_mask_chunks", "chunk_source", "count_polygons", "DEFAULT_CHUNK_POLYGONS"]

DEFAULT_CHUNK_POLYGONS = 1 << 18
"""Polygons per yielded chunk (about 20 MB of 4-vertex polygons with their int64 vertices)."""


def _chunk(lay, dt, cnt, xy, db_unit_nm: float, user_unit_m: float) -> FlatPolygons:
    start = np.zeros(cnt.shape[0] + 1, np.int64)
    np.cumsum(cnt, out=start[1:])
    return FlatPolygons(np.asarray(lay, np.int32), np.asarray(dt, np.int32), start,
                        np.asarray(xy, np.int64).reshape(-1, 2), db_unit_nm, user_unit_m)


_release = _oasis_stream.release_pages


def _cell_chunks(lib, c, aff: np.ndarray, chunk_polygons: int, mm=None) -> Iterator[tuple]:
    """(layer, datatype, counts, xy) blocks of one cell at its placements, in the order :func:`read_mask` uses."""
    if aff.shape[0] == 1 and np.array_equal(aff[0], [1.0, 0.0, 0.0, 1.0, 0.0, 0.0]):
        for r in c.runs:
            for lo in range(0, r.k, chunk_polygons):
                hi = min(r.k, lo + chunk_polygons)
                out = _decode_run(lib.buf, r, lo, hi)  # copies: the file pages can go
                _release(mm, r.pos + lo * r.size, r.pos + hi * r.size)
                yield out
        for e in c.explicit:
            for lo in range(0, e.counts.shape[0], chunk_polygons):
                hi = min(e.counts.shape[0], lo + chunk_polygons)
                v0, v1 = int(e.counts[:lo].sum()), int(e.counts[:hi].sum())
                yield e.layer[lo:hi], e.datatype[lo:hi], e.counts[lo:hi], e.xy[v0:v1]
        return
    lay, dt, cnt, pts = _cell_geometry(lib, c)
    translate_only = np.all(aff[:, :4] == [1.0, 0.0, 0.0, 1.0]) and np.all(aff[:, 4:] == np.rint(aff[:, 4:]))
    step = max(1, chunk_polygons // max(1, cnt.shape[0]))
    ptsf = pts.astype(np.float64)
    for lo in range(0, aff.shape[0], step):  # same arithmetic as gdsread's placement: identical vertices
        a = aff[lo:lo + step]
        m = a.shape[0]
        if translate_only:
            placed = pts[None, :, :] + a[:, None, 4:].astype(np.int64)
        else:
            x, y = ptsf[None, :, 0], ptsf[None, :, 1]
            placed = np.rint(np.stack([a[:, 0:1] * x + a[:, 1:2] * y + a[:, 4:5],
                                       a[:, 2:3] * x + a[:, 3:4] * y + a[:, 5:6]], axis=-1)).astype(np.int64)
        yield np.tile(lay, m), np.tile(dt, m), np.tile(cnt, m), placed.reshape(-1, 2)


def iter_mask_chunks(path, *, layers=None, cell: str | None = None, max_elements: int = DEFAULT_MAX_ELEMENTS,
                     max_vertices: int = DEFAULT_MAX_VERTICES, max_depth: int = DEFAULT_MAX_DEPTH,
                     chunk_polygons: int = DEFAULT_CHUNK_POLYGONS) -> Iterator[FlatPolygons]:
    """Yield the flattened polygons of a mask in chunks (concatenated: exactly :func:`read_mask`'s result).

    Parameters
    ----------
    path : str or os.PathLike
        GDSII or OASIS file.
    layers, cell, max_elements, max_vertices, max_depth
        As :func:`metalay.io.gdsread.read_mask` (the counts are checked before the first chunk is yielded).
    chunk_polygons : int
        Largest number of polygons per chunk (a placed cell with more own polygons yields one placement per chunk).

    Yields
    ------
    FlatPolygons
        Consecutive, non-empty chunks with the file's database and user units.

    Raises
    ------
    MaskReadError
        As :func:`read_mask`, except the memory-budget admission of the flattened result.
    """
    if int(chunk_polygons) < 1:
        raise MaskReadError(f"{path}: chunk_polygons = {chunk_polygons!r}; allowed: an integer >= 1")
    if _sniff(os.fspath(path)) == "OASIS":
        yield from _oasis_chunks(os.fspath(path), layers, cell, max_elements, max_vertices, max_depth,
                                 int(chunk_polygons))
        return
    lib, mm = _parse(path, layers, max_elements, max_vertices, None, release=_release)
    try:
        tops, order = _topology(lib, cell, max_depth)
        sizes = _flat_sizes(lib, order)
        _flat_totals(lib, tops, sizes, max_elements=max_elements, max_vertices=max_vertices)
        inst = _placements(lib, tops, order, sizes)
        db_nm, uu = _nm_from_m(lib.db_unit_m), float(lib.user_unit_m)
        for name in order:
            if name not in inst or lib.cells[name].own_counts()[0] == 0:
                continue
            for lay, dt, cnt, xy in _cell_chunks(lib, lib.cells[name], inst[name][0], int(chunk_polygons), mm):
                if cnt.shape[0]:
                    yield _chunk(lay, dt, cnt.astype(np.int64, copy=False), xy, db_nm, uu)
    finally:
        _close(lib, mm)


def count_polygons(path, *, layers=None, cell: str | None = None, max_elements: int = DEFAULT_MAX_ELEMENTS,
                   max_vertices: int = DEFAULT_MAX_VERTICES, max_depth: int = DEFAULT_MAX_DEPTH) -> tuple[int, int]:
    """Flattened (polygons, vertices) of a mask on ``layers``, counted without flattening (the walk only).

    Lets a check choose between the whole-mask and the streamed method before reading any geometry. For OASIS the
    survey pass only: every repetition and placement counted, nothing expanded.
    """
    if _sniff(os.fspath(path)) == "OASIS":
        mm = _oasis_stream.open_oasis(os.fspath(path))
        try:
            sv = _oasis_survey(os.fspath(path), mm, layers, max_elements, max_vertices)
            tops, order = _topology(sv, cell, max_depth)
            sizes = _flat_sizes(sv, order)
            return sum(sizes[t][0] for t in tops), sum(sizes[t][1] for t in tops)
        finally:
            _close_map(mm)
    lib, mm = _parse(path, layers, max_elements, max_vertices, None, release=_release)
    try:
        tops, order = _topology(lib, cell, max_depth)
        sizes = _flat_sizes(lib, order)
        return sum(sizes[t][0] for t in tops), sum(sizes[t][1] for t in tops)
    finally:
        _close(lib, mm)


def _oasis_survey(path: str, mm, layers, max_elements: int, max_vertices: int):
    try:
        return _oasis_stream.survey(path, mm, _make_filter(layers), max_elements=max_elements,
                                    max_vertices=max_vertices)
    except MemoryError as exc:
        raise MaskReadError(f"{path}: OASIS: out of memory while reading (lower the limits)") from exc


def _oasis_plan(path: str, mm, layers, cell, max_elements: int, max_vertices: int, max_depth: int) -> tuple:
    """The OASIS stream's first pass: survey, then the whole read's hierarchy checks and counts."""
    sv = _oasis_survey(path, mm, layers, max_elements, max_vertices)
    tops, order = _topology(sv, cell, max_depth)
    sizes = _flat_sizes(sv, order)
    _flat_totals(sv, tops, sizes, max_elements=max_elements, max_vertices=max_vertices)
    return sv, tops, order, sizes, _instance_counts(sv, tops, order, sizes)


def _oasis_pieces(path: str, plan: tuple, chunk_polygons: int) -> Iterator[FlatPolygons]:
    """The OASIS stream's second pass over a surveyed file: the cells piece by piece."""
    sv, tops, order, sizes, inst = plan
    sv.held, sv.block = (None, None), (None, None)  # caches of the previous pass, if any
    db_nm, uu = _nm_from_m(sv.db_unit_m), float(sv.user_unit_m)
    try:
        for lay, dt, cnt, xy in _oasis_stream.iter_pieces(sv, tops, order, sizes, inst, chunk_polygons):
            yield _chunk(lay, dt, cnt.astype(np.int64, copy=False), xy, db_nm, uu)
    except MemoryError as exc:
        raise MaskReadError(f"{path}: OASIS: out of memory while streaming") from exc


def _oasis_chunks(path: str, layers, cell, max_elements: int, max_vertices: int, max_depth: int,
                  chunk_polygons: int) -> Iterator[FlatPolygons]:
    """The OASIS stream: survey, the whole read's hierarchy checks and counts, then the cells piece by piece."""
    mm = _oasis_stream.open_oasis(path)
    try:
        yield from _oasis_pieces(path, _oasis_plan(path, mm, layers, cell, max_elements, max_vertices, max_depth),
                                 chunk_polygons)
    finally:
        _close_map(mm)


@contextlib.contextmanager
def chunk_source(path, *, layers=None, cell: str | None = None, max_elements: int = DEFAULT_MAX_ELEMENTS,
                 max_vertices: int = DEFAULT_MAX_VERTICES, max_depth: int = DEFAULT_MAX_DEPTH,
                 chunk_polygons: int = DEFAULT_CHUNK_POLYGONS):
    """A callable giving a fresh :func:`iter_mask_chunks` iterator each time it is called, for a check that reads
    a mask more than once (the streamed design rules read it twice): an OASIS file is surveyed (parsed, checked and
    counted) once, on entry, and kept mapped until exit; a GDSII file is walked again at each call (its walk is
    cheap). The chunks are the same as :func:`iter_mask_chunks`'s (tested)."""
    path = os.fspath(path)
    if int(chunk_polygons) < 1:
        raise MaskReadError(f"{path}: chunk_polygons = {chunk_polygons!r}; allowed: an integer >= 1")
    if _sniff(path) != "OASIS":
        yield lambda: iter_mask_chunks(path, layers=layers, cell=cell, max_elements=max_elements,
                                       max_vertices=max_vertices, max_depth=max_depth, chunk_polygons=chunk_polygons)
        return
    mm = _oasis_stream.open_oasis(path)
    try:
        plan = _oasis_plan(path, mm, layers, cell, max_elements, max_vertices, max_depth)
        yield lambda: _oasis_pieces(path, plan, int(chunk_polygons))
    finally:
        _close_map(mm)


def _close_map(mm) -> None:
    try:
        mm.close()
    except BufferError:
        pass  # a chunk still views the mapping; it closes when collected


def _close(lib, mm) -> None:
    """Drop the parsed buffer and close the file mapping."""
    lib.buf = None
    if mm is not None:
        try:
            mm.close()
        except BufferError:
            pass  # a chunk still views the mapping; it closes when collected
