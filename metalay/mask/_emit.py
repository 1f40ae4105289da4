"""A tile's elements -> the bytes of every output file (GDSII and OASIS), and the sink that writes them in order.

Used only inside :mod:`metalay.mask`. The split is what lets a compile run tile by tile with bounded memory, in
worker threads or as tasks on a cluster (:mod:`metalay.mask.cluster`), and still give the same bytes:

* :func:`emit_elements` and :func:`emit_complement` are pure functions of one tile. They return a list of
  :class:`Part` (which file, which cell, the encoded records) and the keys of the distinct shapes they used.
  Every OASIS part starts from undefined modal state (layer and datatype are written in its first record), so the
  parts of different tiles can be concatenated in any grouping;
* :class:`MaskSink` owns the open files (:class:`~metalay.io.writer.GdsStream`,
  :class:`~metalay.io.oasis_write.OasisStream`) and writes the parts in tile order, then the frame, label and
  marks, the rotation-level masters and the write-field placements. The same parts in the same order give the
  same bytes, whoever computed them.

Layouts (``EmitPlan.mode``):

``flat``
    GDSII: one BOUNDARY per element. OASIS: one POLYGON per distinct exact snapped shape of the tile, placed at its
    first site with a repetition for the others (:func:`metalay.io.oasis_write.encode_shape_groups`).
``levels``
    One master cell per rotation level (``<name>_R0003``) holding the outline at that rotation; the top cell
    places them without rotation (GDSII: one SREF per element; OASIS: one PLACEMENT per level of the tile with a
    repetition). OASIS reference numbers of the masters are fixed in advance (1 + level) so that a tile's
    placements do not depend on the tiles before it; a level no element uses keeps its name in the CELLNAME table
    and gets no cell.
``fields``
    One cell per write field (``<name>_WF_X<i>_Y<j>``) holding the field's elements as in ``flat``, each placed
    once at the origin by the top cell.
``complement``
    The tone-inverted pieces of each band, flat (pieces of equal outline share one OASIS record).

References
----------
SEMI P39, OASIS - Open Artwork System Interchange Standard (CELLNAME reference numbers, PLACEMENT, repetitions,
modal variables, CBLOCK). Calma Company, GDSII Stream Format Manual, Release 6.0 (1987) (BOUNDARY, SREF).
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import OutputError
from metalay.io.oasis_write import (
    EncodedRecords,
    OasisStream,
    encode_placements,
    encode_shape_groups,
    pack_cblocks,
)
from metalay.io.writer import GdsStream, boundary_records, boundary_records_rows, sref_records
from metalay.mask.layout import Polygon, group_shapes
from metalay.mask.process import WriteFieldGrid, field_cell_name, field_index, pieces_by_vertex_count

__all__ = ["EmitPlan", "Part", "SlotElements", "MaskSink", "emit_elements", "emit_complement", "master_name"]


@dataclass(frozen=True)
class EmitPlan:
    """What to encode per tile: the layout and which files.

    Attributes
    ----------
    name : str
        Top cell name (the design name).
    mode : {"flat", "levels", "fields", "complement"}
    gds, oas, holes : bool
        Encode the GDSII mask, the OASIS mask, the elements of a tone inversion (a GDSII file for the checks).
    oas_level : int
        Deflate level of the OASIS CBLOCKs.
    grid : WriteFieldGrid or None
        Write fields (mode ``fields``).
    keys : bool
        Return the keys of the distinct shapes (the manifest's count).
    """

    name: str
    mode: str = "flat"
    gds: bool = True
    oas: bool = False
    holes: bool = False
    oas_level: int = 1
    grid: WriteFieldGrid | None = None
    keys: bool = False


@dataclass(frozen=True)
class Part:
    """Encoded records of one tile for one file and cell.

    ``target`` is ``"gds"``, ``"oas"`` or ``"holes"``; ``cell`` None is the top cell; ``data`` any buffer (GDSII
    element records, or OASIS records packed into CBLOCKs); ``elements`` the GDSII elements or OASIS polygons it
    holds (repetitions counted), ``placements`` its OASIS placements; ``placed`` the cells it places.
    """

    target: str
    cell: str | None
    data: object
    elements: int = 0
    placements: int = 0
    placed: tuple = ()

    @property
    def nbytes(self) -> int:
        return memoryview(self.data).nbytes


@dataclass(frozen=True)
class SlotElements:
    """The elements of one cell slot in a tile: centres (N, 2) int64, snapped offsets (N, V, 2) or None, the
    fast GDSII row layout (:class:`~metalay.mask.layout.SnappedRows`) or None, and rotation levels (N,) or None."""

    slot: int
    datatype: int
    centres: np.ndarray
    offsets: np.ndarray | None = None
    snapped: object = None
    level: np.ndarray | None = None


def master_name(top: str, level: int) -> str:
    """Cell name of the master of rotation level ``level``: ``<top>_R0003``."""
    return f"{top}_R{int(level):04d}"


def _concat(encs: list[EncodedRecords]) -> EncodedRecords:
    encs = [e for e in encs if e.data.shape[0]]
    if not encs:
        return EncodedRecords.empty()
    base = np.cumsum([0] + [e.data.shape[0] for e in encs[:-1]])
    return EncodedRecords(np.concatenate([e.data for e in encs]),
                          np.concatenate([e.ends + b for e, b in zip(encs, base)]),
                          polygons=sum(e.polygons for e in encs), placements=sum(e.placements for e in encs))


def _oas_part(plan: EmitPlan, encs: list[EncodedRecords], cell=None, placed=()) -> list[Part]:
    enc = _concat(encs)
    if enc.polygons == 0 and enc.placements == 0:
        return []
    return [Part("oas", cell, pack_cblocks(enc, level=plan.oas_level), enc.polygons, enc.placements, placed)]


def _gds_records(layer: int, s: SlotElements, where: str):
    if s.snapped is not None:
        return boundary_records_rows(layer, s.datatype, s.centres, s.snapped, where=where)
    return boundary_records(layer, s.datatype, centres_db=s.centres, offsets_db=s.offsets, where=where)


def emit_elements(plan: EmitPlan, layer: int, slots: list[SlotElements], *,
                  where: str = "mask") -> tuple[list[Part], set]:
    """Encode one tile's elements (mode ``flat``, ``levels`` or ``fields``) for every file of ``plan``.

    Parameters
    ----------
    plan : EmitPlan
    layer : int
        Layer of the elements.
    slots : list of SlotElements
        The tile's elements per cell slot, in slot order (mode ``levels``: the masters themselves are written by
        :class:`MaskSink`).

    Returns
    -------
    (parts, keys)
        Parts in a fixed order (GDSII then OASIS; fields by (ix, iy)); keys of the distinct shapes (``(slot,
        shape bytes)``, or ``(slot, level)`` in mode ``levels``) when ``plan.keys``.
    """
    if plan.mode == "levels":
        return _emit_levels(plan, slots)
    if plan.mode == "fields":
        return _emit_fields(plan, layer, slots, where)
    parts: list[Part] = []
    keys: set = set()
    if plan.gds:
        parts += [Part("gds", None, _gds_records(layer, s, where), s.centres.shape[0]) for s in slots]
    if plan.oas or plan.keys:
        encs = []
        for s in slots:  # cell slots (short axis)
            g = group_shapes(s.offsets)
            if plan.keys:
                keys.update((s.slot, shp.tobytes()) for shp in g.shapes_db)
            if plan.oas:
                encs.append(encode_shape_groups(layer, s.datatype, g.shapes_db, g.shape_of_site, s.centres,
                                                where=where))
        if plan.oas:
            parts += _oas_part(plan, encs)
    return parts, keys


def _emit_levels(plan: EmitPlan, slots: list[SlotElements]) -> tuple[list[Part], set]:
    """Mode ``levels``: placements of the rotation-level masters (one slot: geometric-phase libraries only)."""
    parts: list[Part] = []
    keys: set = set()
    for s in slots:
        used, idx = np.unique(s.level, return_inverse=True)
        idx = idx.ravel()
        names = tuple(master_name(plan.name, v) for v in used)
        keys.update((s.slot, int(v)) for v in used)
        if plan.gds:
            order = np.argsort(idx, kind="stable")
            bounds = np.searchsorted(idx[order], np.arange(len(used) + 1))
            rows = [sref_records(names[u], s.centres[order[bounds[u]:bounds[u + 1]]]).ravel()
                    for u in range(len(used))]  # rotation levels (short axis)
            parts.append(Part("gds", None, np.concatenate(rows), s.centres.shape[0], placed=names))
        if plan.oas:
            enc = encode_placements(1 + used.astype(np.int64), idx, s.centres)
            parts += _oas_part(plan, [enc], placed=names)
    return parts, keys


def _emit_fields(plan: EmitPlan, layer: int, slots: list[SlotElements], where: str) -> tuple[list[Part], set]:
    """Mode ``fields``: the tile's elements split by write field, each field's part into the field's own cell."""
    by_field: dict = {}
    for s in slots:  # cell slots (short axis)
        fid = field_index(s.centres, plan.grid)
        order = np.lexsort((fid[:, 1], fid[:, 0]))
        f = fid[order]
        cut = np.flatnonzero(np.any(np.diff(f, axis=0) != 0, axis=1)) + 1
        for sel in np.split(order, cut):  # the write fields this tile touches (a few)
            key = (int(fid[sel[0], 0]), int(fid[sel[0], 1]))
            by_field.setdefault(key, []).append(SlotElements(s.slot, s.datatype, s.centres[sel], s.offsets[sel]))
    parts: list[Part] = []
    keys: set = set()
    flat = EmitPlan(plan.name, "flat", plan.gds, plan.oas, False, plan.oas_level, None, plan.keys)
    for key in sorted(by_field):
        cell = field_cell_name(plan.name, *key)
        p, k = emit_elements(flat, layer, by_field[key], where=where)
        parts += [Part(q.target, cell, q.data, q.elements, q.placements) for q in p]
        keys |= k
    return parts, keys


def emit_complement(plan: EmitPlan, layer: int, datatype: int, tile, *, holes: list[SlotElements] = (),
                    where: str = "mask") -> list[Part]:
    """Encode one band of a tone inversion: its pieces (GDSII boundaries; OASIS one record per distinct outline
    with a repetition) and, when ``plan.holes``, the band's own elements for the checks' GDSII file."""
    parts: list[Part] = []
    if plan.holes:
        parts += [Part("holes", None, _gds_records(layer, s, where), s.centres.shape[0]) for s in holes]
    if tile is None:
        return parts
    encs = []
    for _, verts in pieces_by_vertex_count(tile):  # distinct vertex counts (a few hundred at most)
        if plan.gds:
            parts.append(Part("gds", None, boundary_records(layer, datatype, verts, where=where), verts.shape[0]))
        if plan.oas:
            g = group_shapes(verts - verts[:, :1, :])
            encs.append(encode_shape_groups(layer, datatype, g.shapes_db, g.shape_of_site, verts[:, 0, :],
                                            where=where))
    if plan.oas:
        parts += _oas_part(plan, encs)
    return parts


class MaskSink:
    """The open output files of one compile; writes parts in the order given, then closes the files.

    Parameters
    ----------
    plan : EmitPlan
    paths : dict
        ``{"gds": Path, "oas": Path, "holes": Path}`` for the files ``plan`` asks for.
    db_unit_nm : float
    rotation_levels : int
        K (mode ``levels``): master names 1..K get OASIS reference numbers 1 + level, in advance.
    """

    def __init__(self, plan: EmitPlan, paths: dict, *, db_unit_nm: float, rotation_levels: int = 0):
        self.plan = plan
        self.paths = paths
        self.db_unit_nm = db_unit_nm
        self.rotation_levels = int(rotation_levels)
        self.streams: dict = {}
        self.used_cells: dict[str, None] = {}
        self.keys: set = set()
        self._stack = contextlib.ExitStack()

    def __enter__(self) -> "MaskSink":
        name, db = self.plan.name, self.db_unit_nm
        try:
            for target in ("gds", "holes"):
                if getattr(self.plan, target):
                    self.streams[target] = self._stack.enter_context(
                        GdsStream(self.paths[target], name, db_unit_nm=db))
            if self.plan.oas:
                oas = self.streams["oas"] = self._stack.enter_context(
                    OasisStream(self.paths["oas"], name, db_unit_nm=db, compression_level=self.plan.oas_level))
                if self.plan.mode == "levels":
                    for v in range(self.rotation_levels):  # fixed reference numbers: 1 + level
                        if oas.refnum(master_name(name, v)) != 1 + v:
                            raise OutputError(f"{self.paths['oas']}: cell name {master_name(name, v)!r} is "
                                              "taken (rotation-level masters need their own names)")
        except BaseException:
            self._stack.close()
            raise
        return self

    def write(self, parts: list[Part], keys=()) -> None:
        """Write one tile's parts (in tile order) and remember its shape keys."""
        self.keys.update(keys)
        for p in parts:
            s = self.streams[p.target]
            if p.target == "oas":
                s.write_packed(p.data, cell=p.cell, polygons=p.elements, placements=p.placements, placed=p.placed)
            else:
                s.write_bytes(memoryview(p.data).cast("B"), p.elements, cell=p.cell)
            if p.cell is not None:
                self.used_cells[p.cell] = None
            for c in p.placed:
                self.used_cells[c] = None

    def finish(self, extras: list[Polygon], *, layer: int = 0, datatypes=(), level_shapes=None) -> None:
        """Frame, label and marks into the top cell; rotation-level masters; the write-field cells' placements."""
        name = self.plan.name
        for s in self.streams.values():
            if isinstance(s, OasisStream):
                s.add_polygons(extras)
            else:
                s.polygons(extras)
        if self.plan.mode == "levels":
            for slot, v in sorted(self.keys):  # used rotation levels, in level order
                poly = [Polygon(layer, int(datatypes[slot]), np.asarray(level_shapes[slot][v], np.int64))]
                if "gds" in self.streams:
                    self.streams["gds"].polygons(poly, cell=master_name(name, v))
                if "oas" in self.streams:
                    self.streams["oas"].define_cell(master_name(name, v), poly)
        if self.plan.mode == "fields":
            fields = sorted(self.used_cells)
            if "gds" in self.streams:
                for c in fields:  # write fields (a few hundred), not sites
                    self.streams["gds"].write_records(sref_records(c, np.zeros((1, 2), np.int64)))
            if "oas" in self.streams:
                for c in fields:
                    self.streams["oas"].place(c, 0, 0)

    def hashes(self) -> dict[str, str]:
        """SHA-256 of each file written (after the ``with`` block), keyed by file name."""
        return {Path(self.paths[t]).name: s.sha256 for t, s in self.streams.items() if s.sha256}

    def __exit__(self, exc_type, exc, tb):
        return self._stack.__exit__(exc_type, exc, tb)
