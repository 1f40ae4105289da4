"""Design-rule checks on flattened mask polygons: exact geometry, vectorised over polygons.

Rules (per layer/datatype; each with its fabrication reason in :data:`RULE_REASONS`):

==================  =====  =================================================================================
rule                kind   measured value
==================  =====  =================================================================================
``width``           min    local width: shortest vertex-to-facing-edge distance across the inside [nm]
``spacing``         min    distance between two distinct, disjoint polygons [nm]
``overlap``         flag   two distinct polygons touch or overlap (distance 0)
``area``            min    polygon area [nm^2]
``notch``           min    gap across the outside between two parts of one polygon (slot, hole) [nm]
``hole_area``       min    area of a hole of a keyhole polygon [nm^2]
``vertices``        max    vertices per polygon
``grid``            flag   largest distance of a vertex from the grid, per off-grid polygon [nm]
``angle``           min    smallest interior angle [deg]
``validity``        flag   self-intersecting or degenerate polygon
``aspect_ratio``    max    film height / local width
``field_straddle``  flag   polygon crosses a write-field boundary; value = smaller part across it [nm]
``frame_enclosure`` flag   polygon not inside the region enclosed by the frame layer
==================  =====  =================================================================================

Spacing is found either by a shapely STRtree over all polygons (general path) or, for polygons centred on a
rectangular grid of sites (our own lattice masks), by a stencil of lattice neighbours whose reach is bounded by the
largest circumradius, so both paths examine every pair closer than the limit and give equal results (tested).
The lattice path works polygon chunk by polygon chunk (cache-sized, on METALAY_THREADS threads, default 2; the
result does not depend on the chunking or the thread count): exact-safe lower bounds (bounding-box gaps) drop
pairs that cannot violate, and only the rest get the exact convex-polygon distance.

Counts are per polygon (single-polygon rules, the worst place in the polygon) and per pair (spacing, overlap).
Reports are sorted worst first, then by polygon index, so the same mask gives the same report.
"""

from __future__ import annotations

import math
import os
import re
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from metalay.errors import MaskReadError, RulesError
from metalay.io.gdsread import FlatPolygons, file_sha256, read_mask
from metalay.util._memory import keep_freed_memory
from metalay.validate import TomlTable, load_toml

__all__ = [
    "LayerRules", "RuleSet", "Violations", "RuleResult", "RuleReport", "RULE_REASONS", "RULE_KEYS",
    "load_rules", "parse_rules", "rules_from_library", "check_mask", "write_marker_gds", "compile_check",
    "polygon_distance_kernel", "MAX_PAIRS", "PAIRS_PER_POLYGON",
]


RULE_REASONS = {
    "width": "Narrower lines do not resolve in the resist, or break during development and etch.",
    "spacing": "Closer features bridge: proximity-effect dose and resist residue merge neighbours.",
    "overlap": "Touching or overlapping polygons merge into one feature and receive a doubled exposure dose.",
    "area": "Very small features lift off or wash away and may fall below the writer's smallest shot.",
    "notch": "Narrow slots or holes inside a feature do not clear in development and etch.",
    "hole_area": "Small enclosed openings do not clear in development and etch.",
    "vertices": "Many-vertex polygons slow fracturing and can exceed format or machine limits.",
    "grid": "Vertices off the writing grid are rounded by the fracturer, changing sizes and gaps.",
    "angle": "Acute corners round off in exposure and etch; sharp tips break or lift off.",
    "validity": "Self-intersecting or degenerate polygons are filled differently by each fracturing tool.",
    "aspect_ratio": "Tall narrow pillars bend or collapse under capillary forces when drying, and etch tapers.",
    "field_straddle": "A feature across a write-field boundary is split and suffers field-stitching errors.",
    "frame_enclosure": "Structures outside the frame fall outside the exposed, etched or diced area.",
}
_KIND = {"width": "min", "spacing": "min", "overlap": "flag", "area": "min", "notch": "min", "hole_area": "min",
         "vertices": "max", "grid": "flag", "angle": "min", "validity": "flag", "aspect_ratio": "max",
         "field_straddle": "flag", "frame_enclosure": "flag"}
_UNIT = {"width": "nm", "spacing": "nm", "overlap": "nm", "area": "nm^2", "notch": "nm", "hole_area": "nm^2",
         "vertices": "count", "grid": "nm", "angle": "deg", "validity": "-", "aspect_ratio": "ratio",
         "field_straddle": "nm", "frame_enclosure": "nm"}
_MARKER = {"width": "segment", "spacing": "segment", "overlap": "polygon", "area": "polygon", "notch": "segment",
           "hole_area": "point", "vertices": "polygon", "grid": "point", "angle": "point", "validity": "point",
           "aspect_ratio": "segment", "field_straddle": "polygon", "frame_enclosure": "polygon"}
_RULE_ORDER = tuple(RULE_REASONS)

#: Keys of a ``[[layers]]`` table in a rules file, with (type, low, high) bounds.
RULE_KEYS = {
    "min_width_nm": (float, 0.0, 1e7), "min_spacing_nm": (float, 0.0, 1e7), "forbid_overlap": (bool, None, None),
    "min_area_nm2": (float, 0.0, 1e14), "min_notch_nm": (float, 0.0, 1e7), "min_hole_area_nm2": (float, 0.0, 1e14),
    "max_vertices": (int, 3, 10_000_000), "grid_nm": (float, 1e-6, 1e6), "min_angle_deg": (float, 0.0, 180.0),
    "check_validity": (bool, None, None), "film_height_nm": (float, 0.0, 1e7),
    "max_aspect_ratio": (float, 0.0, 1e6), "no_field_straddle": (bool, None, None),
    "inside_frame": (list, None, None),
}
_GEOM_CHUNK = 1 << 14   # polygons per feature chunk (cache-sized)
_PAIR_CHUNK = 1 << 14   # neighbour pairs per spacing chunk (~1/3 pass the prefilter; larger chunks fall out of cache)


# ----------------------------------------------------------------------------------------------------------------
# Rule sets
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class LayerRules:
    """Rules for one (layer, datatype); ``None`` or ``False`` switches a rule off.

    Lengths in nm, areas in nm^2, angles in degrees.  ``sources`` maps a key to the origin of its value
    (a cited process paper or ``"Common practice (no source)"``).
    """

    layer: int
    datatype: int
    name: str = ""
    min_width_nm: float | None = None
    min_spacing_nm: float | None = None
    forbid_overlap: bool = False
    min_area_nm2: float | None = None
    min_notch_nm: float | None = None
    min_hole_area_nm2: float | None = None
    max_vertices: int | None = None
    grid_nm: float | None = None
    min_angle_deg: float | None = None
    check_validity: bool = False
    film_height_nm: float | None = None
    max_aspect_ratio: float | None = None
    no_field_straddle: bool = False
    inside_frame: tuple[int, int] | None = None
    sources: tuple[tuple[str, str], ...] = ()

    def source(self, key: str) -> str:
        return dict(self.sources).get(key, "")


@dataclass(frozen=True)
class RuleSet:
    """A process's design rules: per-layer rules plus the write field."""

    name: str
    layers: tuple[LayerRules, ...]
    description: str = ""
    write_field_um: float | None = None
    write_field_centre_um: tuple[float, float] = (0.0, 0.0)
    write_field_source: str = ""
    source_path: str | None = None

    def layer_pairs(self) -> list[tuple[int, int]]:
        """Every (layer, datatype) the rules read, including frame layers."""
        out = {(r.layer, r.datatype) for r in self.layers}
        out |= {tuple(r.inside_frame) for r in self.layers if r.inside_frame is not None}
        return sorted(out)


def parse_rules(data: dict, *, where: str = "<rules>") -> RuleSet:
    """Validate a rules dictionary (the parsed TOML) and return a :class:`RuleSet`.

    See :func:`load_rules` for the format. Errors (:class:`RulesError`) name the file, the dotted key, the value
    and the allowed range, through :class:`metalay.validate.TomlTable`.
    """
    top = TomlTable(data, where, error=RulesError)
    top.string("format", "metalay.rules", options=("metalay.rules",))
    version = top.raw("format_version", 1)
    if version != 1:
        top.fail("format_version", version, "allowed: 1")
    name = top.string("name", "rules")
    description = str(top.raw("description", ""))
    wf, wfc, wfs = None, (0.0, 0.0), ""
    if top.has("write_field"):
        t = top.table("write_field")
        wf = float(t.number("size_um", lo=0, lo_open=True, hi=1e5))
        c = t.numbers("centre_um", [0.0, 0.0], length=2, allowed="[x, y] in micrometres")
        wfc, wfs = (float(c[0]), float(c[1])), str(t.raw("source", ""))
        t.check_unknown()
    layers = []
    seen = set()
    for t in top.tables("layers"):
        lr = _parse_layer_rules(t)
        if (lr.layer, lr.datatype) in seen:
            t.fail("layer", lr.layer, "expected each (layer, datatype) once")
        seen.add((lr.layer, lr.datatype))
        layers.append(lr)
    top.check_unknown()
    return RuleSet(name=name, layers=tuple(layers), description=description,
                   write_field_um=wf, write_field_centre_um=wfc, write_field_source=wfs)


def _parse_layer_rules(t: TomlTable) -> LayerRules:
    """One ``[[layers]]`` table: layer, datatype, name, sources and any of :data:`RULE_KEYS`."""
    kw = {"layer": t.number("layer", integer=True, lo=0, hi=65535),
          "datatype": t.number("datatype", 0, integer=True, lo=0, hi=65535)}
    if t.has("name"):
        kw["name"] = t.string("name")
    if t.has("sources"):
        src = t.raw("sources")
        if not isinstance(src, dict) or not all(isinstance(v, str) for v in src.values()):
            t.fail("sources", src, "expected a table of strings keyed by rule key")
        TomlTable(src, t.where, t.key("sources."), error=RulesError).check_unknown(allowed=RULE_KEYS)
        kw["sources"] = tuple(sorted(src.items()))
    for k, (typ, lo, hi) in RULE_KEYS.items():
        if not t.has(k):
            continue
        if typ is bool:
            kw[k] = t.boolean(k)
        elif typ is list:
            v = t.numbers(k, length=2, lo=0, hi=65535, integer=True,
                          allowed="[layer, datatype], integers 0..65535")
            kw[k] = (int(v[0]), int(v[1]))
        else:
            kind = "an integer" if typ is int else "a number"
            kw[k] = typ(t.number(k, lo=lo, hi=hi, integer=typ is int, allowed=f"{kind} in [{lo:g}, {hi:g}]"))
    t.check_unknown(allowed=("layer", "datatype", "name", "sources", *RULE_KEYS))
    lr = LayerRules(**kw)
    if (lr.max_aspect_ratio is None) != (lr.film_height_nm is None):
        t.fail("max_aspect_ratio", lr.max_aspect_ratio, "give it together with film_height_nm (both or neither)")
    return lr


def load_rules(path) -> RuleSet:
    """Load a rules file (TOML) or a bundled rules set by name (e.g. ``"tio2-ebl-example"``).

    Format (``format = "metalay.rules"``, ``format_version = 1``)::

        name = "my-process"
        [write_field]              # optional: e-beam/stepper field, one field centred on centre_um
        size_um = 100.0
        centre_um = [0.0, 0.0]
        [[layers]]
        layer = 1
        datatype = 0
        min_width_nm = 60.0        # any of RULE_KEYS; absent keys switch rules off
        [layers.sources]
        min_width_nm = "Common practice (no source)"
    """
    p = Path(path)
    if not p.exists() and not p.suffix:
        bundled = Path(__file__).resolve().parents[2] / "libraries" / "rules" / f"{p.name}.toml"
        if not bundled.exists():
            try:
                from importlib.resources import files
                bundled = Path(str(files("metalay.libraries") / "rules" / f"{p.name}.toml"))
            except (ModuleNotFoundError, TypeError):
                pass
        p = bundled
    data = load_toml(p, what="rules file", error=RulesError)
    return replace(parse_rules(data, where=str(p)), source_path=str(p))


def rules_from_library(lib_rules: dict, *, layer: tuple[int, int] = (1, 0), film_height_nm: float | None = None,
                       frame_layer: tuple[int, int] | None = None, write_field_um: float | None = None,
                       name: str = "library-default") -> RuleSet:
    """Default rules from a cell library's ``rules`` dict (min_feature_nm, min_gap_nm, max_aspect_ratio, grid_nm).

    Width, spacing, overlap, grid and validity always; aspect ratio when ``film_height_nm`` is given; frame
    enclosure when ``frame_layer`` is given; write-field straddling when ``write_field_um`` is given.
    """
    src = str(lib_rules.get("source", ""))
    def num(k):
        v = lib_rules.get(k)
        if v is None:
            return None
        if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v) or v <= 0:
            raise RulesError(f"library rules: key '{k}' = {v!r} is invalid; allowed: a positive number")
        return float(v)
    ar = num("max_aspect_ratio")
    keys = {"min_width_nm": num("min_feature_nm"), "min_spacing_nm": num("min_gap_nm"), "grid_nm": num("grid_nm")}
    lr = LayerRules(layer=int(layer[0]), datatype=int(layer[1]), name="structures", forbid_overlap=True,
                    check_validity=True, **keys,
                    film_height_nm=float(film_height_nm) if (film_height_nm and ar) else None,
                    max_aspect_ratio=ar if (film_height_nm and ar) else None,
                    no_field_straddle=write_field_um is not None,
                    inside_frame=tuple(frame_layer) if frame_layer is not None else None,
                    sources=tuple(sorted((k, src) for k in ("min_width_nm", "min_spacing_nm", "grid_nm",
                                                             "max_aspect_ratio"))))
    return RuleSet(name=name, layers=(lr,), description="defaults from the cell library",
                   write_field_um=write_field_um)


# ----------------------------------------------------------------------------------------------------------------
# Report structures
# ----------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Violations:
    """Violations of one rule, sorted worst first (then by polygon indices).

    Attributes
    ----------
    polygon, other : np.ndarray (V,) int64
        Index of the polygon in the checked :class:`FlatPolygons`; ``other`` is the second polygon of a pair
        rule, else -1.
    value : np.ndarray (V,) float64
        Measured value in the rule's unit.
    x_um, y_um : np.ndarray (V,) float64
        Location of the violation (closest points' midpoint, vertex, or bounding-box centre) in micrometres.
    segment_um : np.ndarray (V, 4) float64
        (x0, y0, x1, y1): the measured segment (pair or width rules) or the location twice.
    """

    polygon: np.ndarray
    other: np.ndarray
    value: np.ndarray
    x_um: np.ndarray
    y_um: np.ndarray
    segment_um: np.ndarray

    @property
    def count(self) -> int:
        return int(self.polygon.shape[0])

    @staticmethod
    def empty() -> "Violations":
        z = np.zeros(0)
        return Violations(np.zeros(0, np.int64), np.zeros(0, np.int64), z, z, z, np.zeros((0, 4)))


@dataclass(frozen=True)
class RuleResult:
    """Outcome of one rule on one layer."""

    rule: str
    layer: int
    datatype: int
    limit: float
    unit: str
    kind: str
    reason: str
    source: str
    checked: int
    method: str
    violations: Violations
    pair_cap: int | None = None

    @property
    def count(self) -> int:
        return self.violations.count

    @property
    def count_is_lower_bound(self) -> bool:
        """True when the pair search stopped at :data:`MAX_PAIRS` (``pair_cap``): more violations may exist."""
        return self.pair_cap is not None

    @property
    def worst_value(self) -> float | None:
        return float(self.violations.value[0]) if self.count else None

    @property
    def worst_xy_um(self) -> tuple[float, float] | None:
        v = self.violations
        return (float(v.x_um[0]), float(v.y_um[0])) if self.count else None

    def to_dict(self, max_listed: int) -> dict:
        v = self.violations
        n = min(self.count, max_listed)
        listed = [{"polygon": int(v.polygon[i]), "other": int(v.other[i]) if v.other[i] >= 0 else None,
                   "value": _r(v.value[i]), "x_um": _r(v.x_um[i]), "y_um": _r(v.y_um[i])} for i in range(n)]
        return {"rule": self.rule, "layer": self.layer, "datatype": self.datatype, "limit": _r(self.limit),
                "unit": self.unit, "kind": self.kind, "reason": self.reason, "source": self.source,
                "checked": self.checked, "method": self.method, "count": self.count,
                "worst_value": None if self.worst_value is None else _r(self.worst_value),
                "worst_xy_um": None if self.worst_xy_um is None else [_r(c) for c in self.worst_xy_um],
                "listed": listed, "listed_truncated": self.count > n,
                **({"count_is_lower_bound": True, "pair_cap": self.pair_cap} if self.count_is_lower_bound else {})}


def _r(x) -> float:
    """Round for the JSON report (12 significant digits: stable across platforms)."""
    x = float(x)
    return float(f"{x:.12g}") if math.isfinite(x) else x


@dataclass(frozen=True)
class RuleReport:
    """All rule results for one mask.  ``timings_s`` is kept out of :meth:`to_dict` (reports are deterministic)."""

    mask: str
    sha256: str | None
    db_unit_nm: float
    polygons: int
    rules_name: str
    results: tuple[RuleResult, ...]
    timings_s: tuple[tuple[str, float], ...] = field(default=(), compare=False)

    @property
    def total_violations(self) -> int:
        return sum(r.count for r in self.results)

    @property
    def clean(self) -> bool:
        return self.total_violations == 0

    def to_dict(self, max_listed: int = 100) -> dict:
        return {"format": "metalay.rule-report", "format_version": 1, "mask": self.mask, "sha256": self.sha256,
                "db_unit_m": self.db_unit_nm / 1e9, "polygons": self.polygons, "rules": self.rules_name,
                "clean": self.clean, "total_violations": self.total_violations,
                "results": [r.to_dict(max_listed) for r in self.results]}

    def summary_lines(self) -> list[str]:
        """One line per rule: layer, rule, count, worst value and its location."""
        lines = []
        for r in self.results:
            head = f"{r.layer}/{r.datatype} {r.rule:<16} limit {r.limit:g} {r.unit}"
            if r.count == 0:
                lines.append(f"{head}: clean ({r.checked} checked, {r.method})")
            else:
                x, y = r.worst_xy_um
                count = (f"at least {r.count} violations (pair search stopped at {r.pair_cap} pairs: stacked or "
                         "overlapping shapes)" if r.count_is_lower_bound else f"{r.count} violations")
                lines.append(f"{head}: {count}, worst {r.worst_value:.6g} {r.unit} "
                             f"at ({x:.4f}, {y:.4f}) um ({r.method})")
        return lines


# ----------------------------------------------------------------------------------------------------------------
# Geometry kernels (exact on integer coordinates up to the final division / square root)
# ----------------------------------------------------------------------------------------------------------------

def _point_segment(px, py, ax, ay, bx, by):
    """Distance from points P to segments AB (broadcast), same operation order as GEOS pointToSegment.

    Returns (d, fx, fy): distance and the closest point on the segment.
    """
    ex, ey = bx - ax, by - ay
    len2 = ex * ex + ey * ey
    dot = (px - ax) * ex + (py - ay) * ey
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(len2 > 0, dot / len2, 0.0)
        s = ((ay - py) * ex - (ax - px) * ey) / len2
        dmid = np.abs(s) * np.sqrt(len2)
    da = np.sqrt((px - ax) ** 2 + (py - ay) ** 2)
    db = np.sqrt((px - bx) ** 2 + (py - by) ** 2)
    d = np.where(r <= 0, da, np.where(r >= 1, db, dmid))
    rc = np.clip(r, 0.0, 1.0)
    return d, ax + rc * ex, ay + rc * ey


def _reduce(fn, cols):
    out = cols[0]
    for c in cols[1:]:
        out = fn(out, c)
    return out


def _rel_coords(a: np.ndarray, b: np.ndarray):
    """Coordinates of a and b (m, n, 2) relative to a's first vertex as (2, n, m) float64 (exact integers)."""
    m, n, _ = a.shape
    A = np.empty((2, n, m))
    B = np.empty((2, n, m))
    for c in range(2):
        o = a[:, 0, c]
        for k in range(n):
            np.subtract(a[:, k, c], o, out=A[c, k], casting="unsafe")
            np.subtract(b[:, k, c], o, out=B[c, k], casting="unsafe")
    return A, B


def _min_distance_candidates(A, B, points: bool = False):
    """min over all vertex-edge candidates in both directions, (m,), each evaluated like
    :func:`_point_segment` (GEOS pointToSegment); ``dot <= 0`` and ``dot >= len2`` replace ``r = dot / len2 <= 0``
    and ``r >= 1`` (equal for integer coordinates with len2 < 2**52).

    Both directions are stacked on a leading axis (0: vertices of A to edges of B, 1: B to A).  The end-point
    distance of candidate (v, e) is |v - q_e| when dot <= 0 and |v - q_(e+1)| when dot >= len2, so vertex pair
    (v, w) is a candidate when lo[v, w] or hi[v, w - 1]; sqrt is monotone and correctly rounded, so the minimum
    is taken over squared integer distances first.  With ``points`` also returns the closest points (4, m)
    (xa, ya, xb, yb) of a minimising candidate.
    """
    n, m = A.shape[1], A.shape[2]
    E = np.empty((2, 2) + A.shape[1:])         # (coordinate, direction, edge, pair)
    for c in range(2):
        np.subtract(B[c, 1:], B[c, :-1], out=E[c, 0, :-1])
        np.subtract(B[c, 0], B[c, n - 1], out=E[c, 0, -1])
        np.subtract(A[c, 1:], A[c, :-1], out=E[c, 1, :-1])
        np.subtract(A[c, 0], A[c, n - 1], out=E[c, 1, -1])
    L2 = E[0] * E[0] + E[1] * E[1]             # (direction, edge, pair)
    SQ = np.sqrt(L2)
    P = np.stack([A, B], 1)                    # (coordinate, direction, vertex, pair)
    Q = np.stack([B, A], 1)
    wx = P[0][:, :, None] - Q[0][:, None, :]   # (direction, vertex, edge, pair)
    wy = P[1][:, :, None] - Q[1][:, None, :]
    ex, ey = E[0][:, None], E[1][:, None]
    l2 = L2[:, None]
    dot = wx * ex
    dot += wy * ey
    lo = dot <= 0
    hi = dot >= l2
    # squared vertex-vertex distances: direction 1 is direction 0 transposed (squares of negated exact values)
    da2 = np.empty_like(wx)
    np.multiply(wx[0], wx[0], out=da2[0])
    da2[0] += wy[0] * wy[0]
    da2[1] = da2[0].transpose(1, 0, 2)
    vc = np.empty_like(hi)                     # hi of the previous edge: hi[v, w - 1]
    vc[:, :, 1:] = hi[:, :, :-1]
    vc[:, :, 0] = hi[:, :, -1]
    vc |= lo
    vsel = np.where(vc, da2, np.inf).reshape(2 * n * n, m)
    cr = wx * ey
    cr -= wy * ex
    np.abs(cr, out=cr)
    with np.errstate(divide="ignore", invalid="ignore"):
        cr /= l2
        cr *= SQ[:, None]
    mid = np.where(lo | hi, np.inf, cr).reshape(2 * n * n, m)
    vv = vsel.min(0)
    mm = mid.min(0)
    sv = np.sqrt(vv)
    d = np.minimum(sv, mm)
    if not points:
        return d
    use_v = sv <= mm
    k = np.where(use_v, (vsel == vv).argmax(0), (mid == mm).argmax(0))
    r = np.arange(m)
    dirn, v, e = k // (n * n), (k // n) % n, k % n
    Pp = P[:, dirn, v, r]
    Qs = Q[:, dirn, e, r]
    t = np.where(use_v, 0.0, dot.reshape(2 * n * n, m)[k, r] / np.where(use_v, 1.0, L2[dirn, e, r]))
    foot = Qs + t * E[:, dirn, e, r]
    a_side = dirn == 0
    pa = np.where(a_side, Pp, foot)
    pb = np.where(a_side, foot, Pp)
    return d, np.concatenate([pa, pb])


def _separated(A, B):
    """Exact separating-axis test over the edge normals of both convex polygons (2, n, m) -> (m,) bool."""
    m = A.shape[2]
    sep = np.zeros(m, bool)
    for P in (A, B):
        nx = np.roll(P[1], -1, axis=0) - P[1]
        ny = P[0] - np.roll(P[0], -1, axis=0)
        pa = nx[:, None, :] * A[0][None] + ny[:, None, :] * A[1][None]   # (axes, vertices, m)
        pb = nx[:, None, :] * B[0][None] + ny[:, None, :] * B[1][None]
        amax, amin = pa.max(1), pa.min(1)
        bmax, bmin = pb.max(1), pb.min(1)
        sep |= ((amax < bmin) | (bmax < amin)).any(0)
    return sep


def _bbox_disjoint(A, B):
    """True where the bounding boxes of A and B (2, n, m) are strictly disjoint (then the polygons are too)."""
    return ((A[0].max(0) < B[0].min(0)) | (B[0].max(0) < A[0].min(0)) |
            (A[1].max(0) < B[1].min(0)) | (B[1].max(0) < A[1].min(0)))


def _pair_distance(A, B, points: bool = False):
    """Exact distance (m,) between convex polygons A, B given as (2, n, m) relative coordinates; 0 if they meet.

    With ``points`` also the closest points (m, 4) = (xa, ya, xb, yb) in the same relative coordinates (for
    meeting pairs one point twice).
    """
    got = _min_distance_candidates(A, B, points)
    d, p = got if points else (got, None)
    near = np.flatnonzero(~_bbox_disjoint(A, B))
    if near.size:
        sep = _separated(np.take(A, near, axis=2), np.take(B, near, axis=2))
        meet = near[~sep]
        d[meet] = 0.0
        if points:
            p[2:, meet] = p[:2, meet]
    return (d, p.T) if points else d


def polygon_distance_kernel(a: np.ndarray, b: np.ndarray):
    """Exact distance between pairs of convex polygons with the same vertex count.

    Parameters
    ----------
    a, b : np.ndarray, shape (m, n, 2), integer-valued
        Vertices of the two polygons of each pair (any orientation, closing vertex not repeated).

    Returns
    -------
    d : np.ndarray (m,) float64
        0 where the polygons touch or overlap, else the smallest vertex-to-edge distance.
    pa, pb : np.ndarray (m, 2) float64
        Closest points on a and b (for overlapping pairs: one point twice).

    Notes
    -----
    Overlap is decided exactly by the separating-axis theorem with integer edge normals: two convex polygons are
    disjoint iff their projections on some edge normal of either polygon are disjoint (tested only where the
    bounding boxes meet; disjoint boxes mean disjoint polygons).  For disjoint polygons the distance is attained
    at a vertex of one and an edge of the other, so ``d = min(min_v dist(v_a, edges_b), min_v dist(v_b,
    edges_a))`` with each point-to-segment distance evaluated like GEOS: ``|v - a|`` if ``(v - a).e <= 0``,
    ``|v - b|`` if ``(v - a).e >= |e|^2``, else ``|e x (v - a)| / |e|^2 * |e|``.  Coordinates are taken relative to
    a's first vertex, so all products before the final division are exact integers in float64 (for polygons
    under ~1e7 database units across).  Every operation is vectorised over the m pairs (arrays (n, n, m)).

    References
    ----------
    Gottschalk, Lin, Manocha 1996, SIGGRAPH '96, 171-180 (separating axis theorem for convex sets).
    """
    a = np.asarray(a)
    b = np.asarray(b)
    A, B = _rel_coords(a, b)
    d, p = _pair_distance(A, B, points=True)
    o = a[:, 0, :].astype(np.float64)
    return d, p[:, :2] + o, p[:, 2:] + o


def _group_features(X: np.ndarray, want_angle: bool = True):
    """Per-polygon features of a uniform group X (m, n, 2) int64 (loops over the n vertices, vectorised over m).

    Returns dict with area2 (signed, int64), strictly convex & simple flag, min interior angle (deg, only when
    ``want_angle``) and the index of its vertex (kmin), local width (convex polygons only; inf otherwise), bbox
    (m, 4) int64 and r2max (largest squared vertex distance from a bounding-box centre, a float).
    Width segments: :func:`_width_segments`.
    """
    m, n, _ = X.shape
    if n > _WIDE_VERTICES:
        return _group_features_wide(X, want_angle)
    ox, oy = X[:, 0, 0], X[:, 0, 1]
    xi = [X[:, k, 0] - ox for k in range(n)]
    yi = [X[:, k, 1] - oy for k in range(n)]
    area2 = np.zeros(m, np.int64)
    for k in range(n):
        area2 += xi[k] * yi[(k + 1) % n] - xi[(k + 1) % n] * yi[k]
    xs = [c.astype(np.float64) for c in xi]
    ys = [c.astype(np.float64) for c in yi]
    ex = [xs[(k + 1) % n] - xs[k] for k in range(n)]
    ey = [ys[(k + 1) % n] - ys[k] for k in range(n)]
    sgn = np.sign(area2).astype(np.float64)
    convex = area2 != 0
    # with every turn strictly in (0, pi) the total turning of a closed polygon with n <= 4 vertices is exactly
    # 2 pi (a multiple of 2 pi below 4 pi), so the summed turning angle is needed only for n > 4 or the angle rule
    need_turn = want_angle or n > 4
    total = np.zeros(m) if need_turn else None
    amin = np.full(m, np.inf) if want_angle else None
    kmin = np.zeros(m, np.int8 if n < 128 else np.int64)
    for k in range(n):
        cr = ex[k - 1] * ey[k] - ey[k - 1] * ex[k]
        convex &= cr * sgn > 0
        if not need_turn:
            continue
        dt = ex[k - 1] * ex[k] + ey[k - 1] * ey[k]
        turn = np.arctan2(cr, dt)
        total += turn
        if want_angle:
            ang = np.degrees(np.pi - sgn * turn)
            zero = ((ex[k - 1] == 0) & (ey[k - 1] == 0)) | ((ex[k] == 0) & (ey[k] == 0))
            ang = np.where(zero, 180.0, ang)
            upd = ang < amin
            amin = np.where(upd, ang, amin)
            kmin = np.where(upd, k, kmin).astype(kmin.dtype)
    if need_turn:
        convex &= np.abs(np.abs(total) - 2 * np.pi) < 1e-6
    bbox = np.stack([_reduce(np.minimum, [X[:, k, 0] for k in range(n)]),
                     _reduce(np.minimum, [X[:, k, 1] for k in range(n)]),
                     _reduce(np.maximum, [X[:, k, 0] for k in range(n)]),
                     _reduce(np.maximum, [X[:, k, 1] for k in range(n)])], 1)
    width = np.full(m, np.inf)
    if convex.any():  # width is defined here for convex polygons only: skip the O(n^2) loop when there are none
        if not convex.all():
            keep = np.flatnonzero(convex)
            xs, ys, ex, ey = ([a[keep] for a in arrs] for arrs in (xs, ys, ex, ey))
        w_conv = np.full(xs[0].shape[0], np.inf)
        for _i, _j, d, _dt, _l2 in _vertex_edge_distances(xs, ys, ex, ey):
            np.minimum(w_conv, d, out=w_conv)
        width[convex] = w_conv
    return {"area2": area2, "convex": convex, "angle": amin, "kmin": kmin, "width": width, "bbox": bbox,
            "r2max": _r2max(X, bbox)}


def _r2max(X: np.ndarray, bbox: np.ndarray) -> float:
    """Largest squared distance of a vertex from its polygon's bounding-box centre (0 without polygons)."""
    if not X.shape[0]:
        return 0.0
    cx = (bbox[:, 0] + bbox[:, 2]) / 2.0
    cy = (bbox[:, 1] + bbox[:, 3]) / 2.0
    Xf = X.astype(np.float64)
    return float(((Xf[..., 0] - cx[:, None]) ** 2 + (Xf[..., 1] - cy[:, None]) ** 2).max())


def _vertex_edge_distances(xs, ys, ex, ey):
    """For each edge ``i`` and each vertex ``j`` not on it: the distance from ``j`` to edge ``i`` where the foot
    of the perpendicular falls on the edge (inf elsewhere). Yields ``(i, j, d, dt, l2)`` in loop order, with
    ``dt`` the projection on the edge and ``l2`` its squared length (over the polygons of a chunk)."""
    n = len(xs)
    for i in range(n):  # edges of one polygon (a short axis), vectorised over polygons
        l2 = ex[i] * ex[i] + ey[i] * ey[i]
        sq = np.sqrt(l2)
        for j in range(n):
            if j == i or j == (i + 1) % n:
                continue
            wx, wy = xs[j] - xs[i], ys[j] - ys[i]
            dt = wx * ex[i] + wy * ey[i]
            cr = ex[i] * wy - ey[i] * wx
            ok = (dt >= 0) & (dt <= l2) & (l2 > 0)
            with np.errstate(divide="ignore", invalid="ignore"):
                d = np.where(ok, np.abs(cr) / sq, np.inf)
            yield i, j, d, dt, l2


def _width_segments(X: np.ndarray) -> np.ndarray:
    """Width segment (m, 4) = (vertex, foot on the facing edge) of convex polygons X (m, n, 2), database units.

    The first smallest (edge i, vertex j) pair in loop order, as in :func:`_group_features`.
    """
    m, n, _ = X.shape
    if n > _WIDE_VERTICES:
        return _width_segments_wide(X)
    ox, oy = X[:, 0, 0], X[:, 0, 1]
    xs = [(X[:, k, 0] - ox).astype(np.float64) for k in range(n)]
    ys = [(X[:, k, 1] - oy).astype(np.float64) for k in range(n)]
    ex = [xs[(k + 1) % n] - xs[k] for k in range(n)]
    ey = [ys[(k + 1) % n] - ys[k] for k in range(n)]
    width = np.full(m, np.inf)
    wseg = np.zeros((4, m))
    for i, j, d, dt, l2 in _vertex_edge_distances(xs, ys, ex, ey):
        upd = d < width
        if upd.any():
            width = np.where(upd, d, width)
            t = dt[upd] / l2[upd]
            wseg[:, upd] = np.stack([xs[j][upd], ys[j][upd], xs[i][upd] + t * ex[i][upd],
                                     ys[i][upd] + t * ey[i][upd]])
    return (wseg + np.stack([ox, oy, ox, oy]).astype(np.float64)).T


#: Polygons with more vertices than this are measured by :func:`_group_features_wide` (arrays along the vertices,
#: width from a few candidate vertices per edge, O(n log n)) instead of the loop over vertex pairs (O(n^2)).
_WIDE_VERTICES = 32
#: Polygon vertices per feature chunk of wide polygons (bounds the (m, n) temporaries).
_WIDE_CHUNK_VERTICES = 1 << 16


def _chunk_polygons(n: int) -> int:
    """Polygons of ``n`` vertices per feature chunk: :data:`_GEOM_CHUNK`, fewer for many-vertex polygons."""
    return _GEOM_CHUNK if n <= _WIDE_VERTICES else max(1, min(_GEOM_CHUNK, _WIDE_CHUNK_VERTICES // n))


def _edge_arrays(X: np.ndarray):
    """Relative coordinates and edge vectors of X (m, n, 2), each (m, n) float64 (exact integers)."""
    ox, oy = X[:, 0, 0], X[:, 0, 1]
    xs = (X[:, :, 0] - ox[:, None]).astype(np.float64)
    ys = (X[:, :, 1] - oy[:, None]).astype(np.float64)
    ex = np.roll(xs, -1, axis=1) - xs
    ey = np.roll(ys, -1, axis=1) - ys
    return xs, ys, ex, ey


def _convex_width_wide(xs, ys, ex, ey, ccw):
    """Local width of strictly convex polygons (m, n) with O(n log n) work: (width (m,), edge i (m,), vertex j (m,)).

    Equals the loop of :func:`_vertex_edge_distances` (the minimum over edge i and vertex j not on it of
    ``|e_i x (v_j - a_i)| / |e_i|`` where the foot of the perpendicular falls on the edge; ties resolved to the first
    (i, j) in loop order), but evaluates only a few candidates per edge. For a convex polygon the vertices whose
    foot falls on edge i form one arc (their projection on e_i decreases monotonically between the vertex farthest
    along e_i and the one farthest against it), and the distance to the edge's line is unimodal along that arc, so
    its minimum lies at an end of the arc; the ends are found by bisection, and two neighbours on each side of
    each end are evaluated with the loop's exact expressions.

    ``ccw`` (m,) bool tells the orientation; clockwise polygons are mirrored (x -> -x) for the search only.
    """
    m, n = xs.shape
    sx = np.where(ccw, 1.0, -1.0)[:, None]
    mex = ex * sx
    # turning angle at each vertex k (between edges k-1 and k), in (0, pi) for a strictly convex CCW polygon
    exm, eym = np.roll(mex, 1, axis=1), np.roll(ey, 1, axis=1)
    turn = np.arctan2(exm * ey - eym * mex, exm * mex + eym * ey)
    psi = np.zeros((m, 2 * n))
    psi[:, 1:n] = np.cumsum(turn[:, 1:], axis=1)  # direction of edge k relative to edge 0
    total = psi[:, n - 1] + turn[:, 0]
    psi[:, n:] = psi[:, :n] + total[:, None]
    # row offsets make one sorted array, so that one searchsorted serves every polygon
    span = 4.0 * np.pi + 1.0
    flat_psi = (psi + span * np.arange(m)[:, None]).ravel()
    base = (span * np.arange(m))[:, None]
    i = np.arange(n)[None, :]
    row = np.arange(m)[:, None]
    far_along = np.searchsorted(flat_psi, (psi[:, :n] + np.pi / 2 + base).ravel()).reshape(m, n) - row * 2 * n
    far_against = np.searchsorted(flat_psi, (psi[:, :n] + 1.5 * np.pi + base).ravel(),
                                  side="right").reshape(m, n) - row * 2 * n
    lo_idx = np.clip(far_along, i + 1, i + n)
    hi_idx = np.clip(far_against, lo_idx, i + n)
    l2 = ex * ex + ey * ey

    def proj(j):  # projection of vertex j (ext index) on edge i, from a_i
        jj = j % n
        return (np.take_along_axis(xs, jj, 1) - xs) * ex + (np.take_along_axis(ys, jj, 1) - ys) * ey

    def first_where(pred):  # first ext index in [lo_idx, hi_idx] where pred(proj) holds (monotone), else hi + 1
        lo, hi = lo_idx.copy(), hi_idx + 1
        while True:
            active = lo < hi
            if not active.any():
                return lo
            mid = (lo + hi) // 2
            ok = pred(proj(np.minimum(mid, i + n)))
            hi = np.where(active & ok, mid, hi)
            lo = np.where(active & ~ok, mid + 1, lo)

    p = first_where(lambda t: t <= l2)           # arc start: first vertex whose foot is not past the edge's end
    q = first_where(lambda t: t < 0) - 1         # arc end: last vertex whose foot is not before its start
    cand = np.concatenate([p[:, :, None] + np.arange(-2, 3), q[:, :, None] + np.arange(-2, 3)], axis=2) % n
    ii = np.broadcast_to(i[:, :, None], cand.shape)
    rr = np.broadcast_to(row[:, :, None], cand.shape)
    wx, wy = xs[rr, cand] - xs[rr, ii], ys[rr, cand] - ys[rr, ii]
    exi, eyi, l2i = ex[rr, ii], ey[rr, ii], l2[rr, ii]
    dt = wx * exi + wy * eyi
    cr = exi * wy - eyi * wx
    ok = (dt >= 0) & (dt <= l2i) & (l2i > 0) & (cand != ii) & (cand != (ii + 1) % n)
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.where(ok, np.abs(cr) / np.sqrt(l2i), np.inf)
    d = d.reshape(m, -1)
    width = d.min(axis=1)
    # the first (i, j) in loop order among the minimisers
    key = np.where(d == width[:, None], ii.reshape(m, -1) * n + cand.reshape(m, -1), n * n)
    k = key.min(axis=1)
    return width, k // n, k % n


def _group_features_wide(X: np.ndarray, want_angle: bool = True):
    """:func:`_group_features` for many-vertex polygons: the same features with arrays along the vertices.

    Identical results (integer area, the same per-vertex expressions, the turning sum accumulated in vertex
    order by ``cumsum``, the first smallest angle by ``argmin``), with the width from :func:`_convex_width_wide`.
    """
    m, n, _ = X.shape
    xi = X[:, :, 0] - X[:, :1, 0]
    yi = X[:, :, 1] - X[:, :1, 1]
    area2 = (xi * np.roll(yi, -1, axis=1) - np.roll(xi, -1, axis=1) * yi).sum(axis=1)
    xs, ys, ex, ey = _edge_arrays(X)
    sgn = np.sign(area2).astype(np.float64)
    exm, eym = np.roll(ex, 1, axis=1), np.roll(ey, 1, axis=1)
    cr = exm * ey - eym * ex
    convex = (area2 != 0) & (cr * sgn[:, None] > 0).all(axis=1)
    dt = exm * ex + eym * ey
    turn = np.arctan2(cr, dt)
    total = np.cumsum(turn, axis=1)[:, -1]
    convex &= np.abs(np.abs(total) - 2 * np.pi) < 1e-6
    amin = None
    kmin = np.zeros(m, np.int8 if n < 128 else np.int64)
    if want_angle:
        ang = np.degrees(np.pi - sgn[:, None] * turn)
        zero = ((exm == 0) & (eym == 0)) | ((ex == 0) & (ey == 0))
        ang = np.where(zero, 180.0, ang)
        kmin = np.argmin(ang, axis=1).astype(kmin.dtype)
        amin = ang[np.arange(m), kmin]
    bbox = np.stack([X[:, :, 0].min(1), X[:, :, 1].min(1), X[:, :, 0].max(1), X[:, :, 1].max(1)], 1)
    width = np.full(m, np.inf)
    if convex.any():
        keep = np.flatnonzero(convex)
        width[keep] = _convex_width_wide(xs[keep], ys[keep], ex[keep], ey[keep], area2[keep] > 0)[0]
    return {"area2": area2, "convex": convex, "angle": amin, "kmin": kmin, "width": width, "bbox": bbox,
            "r2max": _r2max(X, bbox)}


def _width_segments_wide(X: np.ndarray) -> np.ndarray:
    """:func:`_width_segments` for many-vertex convex polygons (the same (i, j) and the same expressions)."""
    m, n, _ = X.shape
    xs, ys, ex, ey = _edge_arrays(X)
    area2 = (xs * np.roll(ys, -1, axis=1) - np.roll(xs, -1, axis=1) * ys).sum(axis=1)
    _, bi, bj = _convex_width_wide(xs, ys, ex, ey, area2 > 0)
    r = np.arange(m)
    l2 = ex[r, bi] * ex[r, bi] + ey[r, bi] * ey[r, bi]
    dt = (xs[r, bj] - xs[r, bi]) * ex[r, bi] + (ys[r, bj] - ys[r, bi]) * ey[r, bi]
    with np.errstate(divide="ignore", invalid="ignore"):  # rows that are not convex are replaced by the caller
        t = dt / l2
    wseg = np.stack([xs[r, bj], ys[r, bj], xs[r, bi] + t * ex[r, bi], ys[r, bi] + t * ey[r, bi]])
    o = X[:, 0, :].astype(np.float64)
    return (wseg + np.stack([o[:, 0], o[:, 1], o[:, 0], o[:, 1]])).T


def _ring(flat: FlatPolygons, k: int) -> np.ndarray:
    return flat.xy_db[flat.start[k]:flat.start[k + 1]]


def _shapely_polygon_analysis(ring: np.ndarray, want_width: bool, want_notch: bool,
                               reach_db: float | None = None):
    """Exact analysis of a non-convex (or non-strict) polygon with shapely.

    Returns dict: valid (bool), where (x, y) of invalidity, width (d, seg) and notch (d, seg) or None,
    holes [(area, (x, y))]. With ``reach_db`` the width and notch are exact where they are below ``reach_db``
    (database units; the largest limit a rule compares them with) and may be missing (None) above it.
    """
    import shapely

    out = {"valid": True, "where": None, "width": None, "notch": None, "holes": []}
    n = ring.shape[0]
    uniq = np.unique(ring, axis=0).shape[0] if n else 0
    if n < 3 or uniq < 3:
        out["valid"] = False
        out["where"] = tuple(ring.mean(0)) if n else (0.0, 0.0)
        return out
    coords = ring.astype(np.float64)
    poly = shapely.Polygon(coords)
    signed_area2 = float(np.sum(coords[:, 0] * np.roll(coords[:, 1], -1) - np.roll(coords[:, 0], -1) * coords[:, 1]))
    area_ring = abs(signed_area2) / 2
    if area_ring == 0:
        out["valid"] = False
        out["where"] = tuple(coords.mean(0))
        return out
    poly_as_given = bool(shapely.is_valid(poly))
    if not poly_as_given:
        # a keyhole (boundary touching itself along a cut line) encodes a polygon with holes: accept it. Repairing
        # costs memory in the number of self-intersections (up to n^2 / 2: 3.4e7 for 8190 vertices), so a ring
        # that touches itself more often than a keyhole would is invalid without repair
        many = _edge_contacts(coords, cap=max(64, 4 * n)) > max(64, 4 * n)
        fixed = None if many else shapely.make_valid(poly, method="structure", keep_collapsed=False)
        if fixed is not None and fixed.geom_type == "Polygon" and abs(fixed.area - area_ring) <= 1e-9 * area_ring:
            poly = fixed
        else:
            out["valid"] = False
            reason = shapely.is_valid_reason(shapely.Polygon(coords))
            mt = re.search(r"\[([-+0-9.eE]+) ([-+0-9.eE]+)\]", reason)
            out["where"] = (float(mt.group(1)), float(mt.group(2))) if mt else tuple(coords.mean(0))
            return out
    for hole in poly.interiors:
        hp = shapely.Polygon(hole)
        c = hp.centroid
        out["holes"].append((hp.area, (c.x, c.y)))
    if not (want_width or want_notch):
        return out
    shapely.prepare(poly)
    regions = {"width": poly if want_width else None, "notch": None}
    if want_notch:
        minx, miny, maxx, maxy = poly.bounds
        regions["notch"] = shapely.box(minx - 1, miny - 1, maxx + 1, maxy + 1).difference(poly)
        shapely.prepare(regions["notch"])
    # many-vertex rings given as simple polygons: candidates whose segment clearly leaves the region at one of its
    # ends are dropped before the (costly) inside test (:func:`_locally_outside`; ambiguous ones are kept)
    prefilter = reach_db is not None and n > _INDEXED_PAIRS_VERTICES and poly_as_given
    for ii, jj, a, e, v, len2, dt, cr in _facing_pairs(coords, reach_db):
        d = np.abs(cr) / np.sqrt(len2)
        foot = a + e * (dt / len2)[:, None]
        side = _locally_outside(coords, np.sign(signed_area2), ii, jj, foot, dt, len2, cr) if prefilter else None
        for key, region in regions.items():
            if region is None:
                continue
            keep = None if side is None else (side != (-1 if key == "width" else 1)) & (side != 2)
            # blocks come in edge order, so a later block wins only with a strictly smaller distance
            k = _first_inside(region, v, foot, d, np.inf if out[key] is None else out[key][0], keep)
            if k is not None:
                out[key] = (float(d[k]), np.concatenate([v[k], foot[k]]))
    return out


def _wedge_side(coords: np.ndarray, sgn: float, at: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Where direction ``u`` (m, 2) leaves vertex ``at`` (m,) of a simple ring: +1 clearly into the interior wedge,
    -1 clearly into the exterior, 0 along an edge or too close to tell (1e-9 rad)."""
    n = coords.shape[0]
    v = coords[at]
    r1 = coords[(at + 1) % n] - v        # outgoing edge
    r2 = coords[(at - 1) % n] - v        # incoming edge, reversed
    if sgn < 0:  # mirror a clockwise ring so that the interior wedge turns counter-clockwise from r1 to r2
        r1, r2, u = r1 * [-1, 1], r2 * [-1, 1], u * [-1, 1]

    def turn(p, q):
        return np.mod(np.arctan2(p[:, 0] * q[:, 1] - p[:, 1] * q[:, 0], (p * q).sum(1)), 2 * np.pi)

    wedge, ang = turn(r1, r2), turn(r1, u)
    tol = 1e-9
    inside = (ang > tol) & (ang < wedge - tol)
    outside = (ang > wedge + tol) & (ang < 2 * np.pi - tol)
    return np.where(inside, 1, np.where(outside, -1, 0))


def _locally_outside(coords, sgn, ii, jj, foot, dt, len2, cr) -> np.ndarray:
    """For each segment vertex jj -> foot on edge ii of a simple ring: -1 when it clearly starts or ends outside the
    polygon, +1 when it clearly starts or ends inside it (so it is not in the exterior), 2 when it lies on an edge
    (in neither region's interior), 0 otherwise. Exact in its decisions: near a vertex the polygon is its interior
    wedge; near a point strictly inside an edge it is the half-plane on the interior side (the sign of the integer
    cross product ``cr``)."""
    n = coords.shape[0]
    at_v = _wedge_side(coords, sgn, jj, foot - coords[jj])
    strict = (dt > 0) & (dt < len2) & (np.abs(cr) > 1e-9 * len2)
    at_foot = np.where(strict, np.where(cr * sgn > 0, 1, -1), 0)
    corner = ~strict & ((dt == 0) | (dt == len2))
    along = np.zeros(jj.shape[0], bool)
    if corner.any():
        k = np.flatnonzero(corner)
        vert = np.where(dt[k] == 0, ii[k], (ii[k] + 1) % n)
        u = coords[vert] - coords[jj[k]]  # integers: the foot is a vertex
        at_foot[k] = _wedge_side(coords, sgn, vert, -u)
        # the segment is a piece of an edge leaving its start vertex (same direction, not longer): it lies on the
        # boundary, so its midpoint is in neither region's interior (exact in float64 below 2**26)
        for nb in ((jj[k] + 1) % n, (jj[k] - 1) % n):
            r = coords[nb] - coords[jj[k]]
            small = np.maximum(np.abs(r).max(1), np.abs(u).max(1)) < 2.0 ** 26
            along[k] |= small & (r[:, 0] * u[:, 1] - r[:, 1] * u[:, 0] == 0) & ((r * u).sum(1) > 0) & (
                (u * u).sum(1) <= (r * r).sum(1))
    out = np.zeros(jj.shape[0], np.int64)
    out[(at_v == -1) | (at_foot == -1)] = -1
    out[(at_v == 1) | (at_foot == 1)] = 1
    out[((at_v == -1) | (at_foot == -1)) & ((at_v == 1) | (at_foot == 1))] = 0  # both: leave it to the exact test
    out[along] = 2
    return out


def _edge_contacts(coords: np.ndarray, cap: int) -> int:
    """Pairs of non-adjacent edges of a ring that meet (touch or cross), counted up to just past ``cap``
    (an STRtree over the edges, queried in blocks; a simple ring has none, a keyhole a few). A ring whose edges'
    bounding boxes overlap in more than ``50 n`` pairs (long edges criss-crossing it) counts as past the cap
    without testing them all."""
    import shapely

    n = coords.shape[0]
    edges = shapely.linestrings(np.stack([coords, np.roll(coords, -1, axis=0)], 1))
    tree = shapely.STRtree(edges)
    boxes, lo, block = 0, 0, 32
    while lo < n:
        boxes += int(tree.query(edges[lo:lo + block]).shape[1])
        if boxes > 50 * n + 10_000:
            return cap + 1
        lo += block
        block = min(2 * block, 1024)
    found = 0
    for lo in range(0, n, 1024):
        q = tree.query(edges[lo:lo + 1024], predicate="intersects")
        i, j = q[0] + lo, q[1]
        gap = (j - i) % n
        found += int(((i < j) & (gap != 1) & (gap != n - 1)).sum())
        if found > cap:
            break
    return found


def _first_inside(region, v, foot, d, below: float, keep=None):
    """Index of the shortest segment v -> foot (first in pair order among equals) shorter than ``below`` that runs
    inside ``region`` (crosses it, not along its boundary); None if there is none.

    Segments are tested shortest first in growing batches, so the search usually stops after the first batch
    instead of testing every pair (the same answer as testing all and taking the first minimum); ``keep`` (bool,
    optional) drops candidates known to fail.
    """
    import shapely

    cand = np.flatnonzero((d < below) if keep is None else (d < below) & keep)
    order = cand[np.argsort(d[cand], kind="stable")]
    lo, batch = 0, 4
    while lo < order.size:
        sel = order[lo:lo + batch]
        mid = (v[sel] + foot[sel]) / 2
        inside = shapely.contains_xy(region, mid[:, 0], mid[:, 1])
        if inside.any():  # covers only where the midpoint is inside (the cheaper test first; the same result)
            segs = shapely.linestrings(np.stack([v[sel[inside]], foot[sel[inside]]], 1))
            inside[inside] = shapely.covers(region, segs)
        if inside.any():
            return int(sel[np.argmax(inside)])
        lo += batch
        batch = min(4 * batch, 1 << 14)
    return None


#: Non-convex polygons with more vertices than this look for facing (edge, vertex) pairs through a spatial index
#: within the reach of the rules instead of trying all n^2 pairs.
_INDEXED_PAIRS_VERTICES = 64
_FACING_BLOCK_EDGES = 256


def _facing_pairs(coords: np.ndarray, reach_db: float | None):
    """Blocks (in edge order, pairs sorted by (edge, vertex)) of (edge i, vertex j not on it) pairs where the foot
    of the perpendicular from j falls inside edge i and j is off its line: (i, j, a, e, v, len2, dt, cr) per pair.

    With ``reach_db`` (and more than :data:`_INDEXED_PAIRS_VERTICES` vertices) only pairs whose point-to-segment
    distance is within ``reach_db`` are produced (found with a shapely STRtree, edges in blocks of 256): linear in
    the vertices for a reach small against the polygon, and never more than 256 n pairs in memory.
    """
    import shapely

    n = coords.shape[0]
    if reach_db is None or n <= _INDEXED_PAIRS_VERTICES:
        ii = np.repeat(np.arange(n), n)
        jj = np.tile(np.arange(n), n)
        blocks = [(ii, jj)]
    else:
        tree = shapely.STRtree(shapely.points(coords))
        ends = np.stack([coords, np.roll(coords, -1, axis=0)], 1)

        def block(lo):
            hi = min(n, lo + _FACING_BLOCK_EDGES)
            q = tree.query(shapely.linestrings(ends[lo:hi]), predicate="dwithin", distance=reach_db)
            order = np.lexsort((q[1], q[0]))
            return q[0][order] + lo, q[1][order]

        blocks = (block(lo) for lo in range(0, n, _FACING_BLOCK_EDGES))
    for ii, jj in blocks:
        sel = (jj != ii) & (jj != (ii + 1) % n)
        ii, jj = ii[sel], jj[sel]
        a = coords[ii]
        e = coords[(ii + 1) % n] - a
        v = coords[jj]
        w = v - a
        len2 = (e * e).sum(1)
        dt = (w * e).sum(1)
        ok = (len2 > 0) & (dt >= 0) & (dt <= len2)
        cr = e[:, 0] * w[:, 1] - e[:, 1] * w[:, 0]
        ok &= cr != 0
        if ok.any():
            yield ii[ok], jj[ok], a[ok], e[ok], v[ok], len2[ok], dt[ok], cr[ok]


# ----------------------------------------------------------------------------------------------------------------
# Spacing: general path (STRtree) and lattice-neighbour fast path
# ----------------------------------------------------------------------------------------------------------------

def _shapely_polygons(flat: FlatPolygons, idx: np.ndarray):
    import shapely

    counts = _counts_of(flat, idx)
    vidx = np.repeat(flat.start[idx], counts) + (np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts,
                                                                                           counts))
    rings = shapely.linearrings(flat.xy_db[vidx].astype(np.float64), indices=np.repeat(np.arange(idx.size), counts))
    return shapely.polygons(rings)


#: Most (polygon, polygon) pairs the spacing and overlap search keeps per layer: stacked or overlapping shapes can
#: make the pairs quadratic in the polygons (65,536 boxes on one spot are 2.1e9 overlapping pairs). Past the cap
#: (262,144 pairs, or 4 per polygon of the layer when that is more: a lattice of fins has at most 4 neighbours
#: closer than a gap rule per fin, so real masks never reach it) the search stops; the first pairs in polygon order
#: are kept and the counts are reported as lower bounds.
MAX_PAIRS = 1 << 18
PAIRS_PER_POLYGON = 4
_TREE_RESULTS_PER_CHUNK = 1 << 17


def _cap_pairs(a, b, d, c, max_pairs: int):
    """Keep the first ``max_pairs`` pairs in (a, b) order; returns the arrays and whether any were dropped."""
    if a.size <= max_pairs:
        return a, b, d, c, False
    keep = np.lexsort((b, a))[:max_pairs]
    return a[keep], b[keep], d[keep], c[keep], True


def _pairs_tree(flat: FlatPolygons, idx: np.ndarray, s_db: float, max_pairs: int = MAX_PAIRS):
    """Pairs (i < j, indices into flat) at distance < s_db (or touching when s_db == 0), via STRtree.

    The tree is queried in chunks of polygons (in order), sized from the density of the previous chunk so that a
    chunk returns about 1.3e5 candidates (the first chunk is one polygon, and a chunk is at most twice the size of
    the previous one, so a dense region further on costs one chunk at most); the search stops once more than
    ``max_pairs`` pairs are found (every pair whose first polygon was queried is found, so the first
    ``max_pairs`` in polygon order are exact).
    Returns (a, b, d, c, capped).
    """
    import shapely

    polys = _shapely_polygons(flat, idx)
    tree = shapely.STRtree(polys)
    parts, found, lo, step = [], 0, 0, 1
    while lo < idx.size and found <= max_pairs:
        hi = min(idx.size, lo + step)
        if s_db > 0:
            q = tree.query(polys[lo:hi], predicate="dwithin", distance=s_db)
        else:
            q = tree.query(polys[lo:hi], predicate="intersects")
        density = max(1.0, q.shape[1] / (hi - lo))
        a, b = q[0] + lo, q[1]
        a, b = a[a < b], b[a < b]
        d = shapely.distance(polys[a], polys[b])
        keep = (d < s_db) | (d == 0)
        parts.append((a[keep], b[keep], d[keep]))
        found += int(keep.sum())
        step = int(min(4096, 2 * step, max(1, _TREE_RESULTS_PER_CHUNK / density)))  # grows at most 2x a chunk
        lo = hi
    a = np.concatenate([p[0] for p in parts]) if parts else np.zeros(0, np.int64)
    b = np.concatenate([p[1] for p in parts]) if parts else np.zeros(0, np.int64)
    d = np.concatenate([p[2] for p in parts]) if parts else np.zeros(0)
    a, b, d, _, capped = _cap_pairs(a, b, d, d, max_pairs)
    if a.size:
        lines = shapely.shortest_line(polys[a], polys[b])
        c = shapely.get_coordinates(lines).reshape(-1, 4)
    else:
        c = np.zeros((0, 4))
    return idx[a], idx[b], d, c, capped


def _gcd_all(v: np.ndarray) -> int:
    """Greatest common divisor of non-negative integers ``v`` (0 when all are 0), equal to ``np.gcd.reduce``.

    The gcd ``g`` of a sample is a multiple of the gcd of all; when every value is a multiple of ``g`` (one
    vectorised remainder, much cheaper than a gcd per value) it is the gcd of all, else the full reduction runs.
    """
    sample = v[:: max(1, v.size // 4096)]
    g = int(np.gcd.reduce(sample)) if sample.size else 0
    step = 1 << 20  # the remainder in cache-sized pieces
    if g > 0 and not any(np.any(v[lo:lo + step] % g) for lo in range(0, v.size, step)):
        return g
    return int(np.gcd.reduce(v)) if v.size else 0


def _lattice_plan(bbox: np.ndarray, rmax: float, reach_db: float, max_stencil: int = 400):
    """Site grid of polygons centred on a rectangular grid of sites, or None if they are not on one.

    A site is the doubled bounding-box centre (integer); the grid steps are the gcd of the site differences per
    axis.  The stencil holds every site offset whose centre distance is <= 2 * rmax + reach_db, so no pair closer
    than reach_db can be missed (distance >= centre distance - r_a - r_b).

    Returns dict: grid (flat array of polygon positions, -1 where empty, padded by the stencil reach so lookups
    need no bounds checks), I, J (P,) padded site indices, si, sj (grid strides of i and j, the layout chosen to
    follow the polygon order), offsets [(di, dj)] (half stencil inside the grid), deltas (grid index step per
    offset), n_offsets (stencil size), gx, gy (doubled site steps), hx2max, hy2max (largest bounding-box width
    and height).
    """
    P = bbox.shape[0]
    if P < 2:
        return None
    steps, ids = [], []
    for ax in (0, 1):
        c2 = bbox[:, ax] + bbox[:, ax + 2]
        c2 -= c2.min()
        g = _gcd_all(c2)
        g = g if g > 0 else 1 << 40
        np.floor_divide(c2, g, out=c2)
        ids.append(c2)
        steps.append(g)
    gx, gy = steps
    ni, nj = int(ids[0].max()) + 1, int(ids[1].max()) + 1
    if ni * nj > 8 * P + (1 << 20):
        return None
    reach = 2.0 * rmax + reach_db
    hx, hy = gx / 2.0, gy / 2.0  # site steps in database units
    kx = int(math.floor(reach / hx)) if hx < 1e30 else 0
    ky = int(math.floor(reach / hy)) if hy < 1e30 else 0
    if (2 * kx + 1) * (2 * ky + 1) > 2 * max_stencil:
        return None
    all_offsets = [(di, dj) for di in range(0, kx + 1) for dj in range(-ky, ky + 1)
                   if (di > 0 or dj > 0) and math.hypot(di * hx, dj * hy) <= reach]
    offsets = [(di, dj) for di, dj in all_offsets if di < ni and abs(dj) < nj]
    kx = max([di for di, _ in offsets], default=0)
    ky = max([abs(dj) for _, dj in offsets], default=0)
    # the grid is padded by the stencil reach (kx cells after i, ky cells on both sides of j) so that every
    # neighbour lookup is one gather without bounds checks
    nip, njp = ni + kx, nj + 2 * ky
    it = np.int32 if max(nip * njp, P) < 2 ** 31 - 1 else np.int64
    I, J = ids[0].astype(it), (ids[1] + ky).astype(it)
    del ids
    # grid layout following the polygon order (consecutive polygons -> nearby grid cells)
    s = slice(0, min(P, 1 << 16))
    kr = I[s].astype(np.int64) * njp + J[s]
    kc = J[s].astype(np.int64) * nip + I[s]
    row_major = bool(np.abs(np.diff(kr)).sum() <= np.abs(np.diff(kc)).sum())
    si, sj = (njp, 1) if row_major else (1, nip)
    key = I.astype(np.int64)
    key *= si
    jk = J.astype(np.int64)
    jk *= sj
    key += jk
    del jk
    grid = np.full(nip * njp, -1, it)
    grid[key] = np.arange(P, dtype=it)
    del key
    if np.count_nonzero(grid >= 0) != P:
        return None  # two polygons on one site (one overwrote the other)
    # largest bounding-box half extents (doubled, integers) for the per-polygon prefilter
    hx2max = int((bbox[:, 2] - bbox[:, 0]).max())
    hy2max = int((bbox[:, 3] - bbox[:, 1]).max())
    return {"grid": grid, "I": I, "J": J, "si": si, "sj": sj, "offsets": offsets, "hx2max": hx2max,
            "hy2max": hy2max,
            "deltas": np.array([di * si + dj * sj for di, dj in offsets], np.int64),
            "n_offsets": len(all_offsets), "gx": gx, "gy": gy}


def _lattice_chunk(X, bbox, plan, lo: int, hi: int, s_db: float):
    """Pairs (a, b positions) of polygons [lo, hi) and their stencil neighbours closer than s_db (or meeting).

    Returns (a, b, d, c) with c (k, 4) the closest points in database units (on a, then on b), ordered by a and
    then by stencil offset.
    """
    n_off = len(plan["offsets"])
    C = hi - lo
    if n_off == 0 or C <= 0:
        z = np.zeros(0, np.int64)
        return z, z, np.zeros(0), np.zeros((0, 4))
    s2 = s_db * s_db * (1.0 + 1e-9)
    ba = bbox[lo:hi]
    # exact-safe prefilter 0 (per polygon, no neighbour lookup): the site offset minus this polygon's and the
    # largest bounding-box half extent bounds the bounding-box gap from below (doubled integer units)
    off = np.array(plan["offsets"], np.int64) * np.array([plan["gx"], plan["gy"]], np.int64)   # doubled units
    lx = np.maximum(np.abs(off[None, :, 0]) - (ba[:, 2] - ba[:, 0])[:, None] - plan["hx2max"], 0)
    ly = np.maximum(np.abs(off[None, :, 1]) - (ba[:, 3] - ba[:, 1])[:, None] - plan["hy2max"], 0)
    lx, ly = lx.astype(np.float64) / 2, ly.astype(np.float64) / 2
    sel = np.flatnonzero(lx * lx + ly * ly <= s2)                        # into (C, n_off)
    c_i, w = sel // n_off, sel % n_off
    key0 = plan["I"][lo + c_i].astype(np.int64) * plan["si"] + plan["J"][lo + c_i].astype(np.int64) * plan["sj"]
    nb = plan["grid"][key0 + plan["deltas"][w]]                          # -1 where no polygon
    # exact-safe prefilter 1: bounding-box distance (integer) >= s_db cannot violate
    bb = bbox[nb]                                                        # rows of -1 entries are masked below
    bc = ba[c_i]
    gxp = np.maximum(np.maximum(bb[:, 0] - bc[:, 2], bc[:, 0] - bb[:, 2]), 0).astype(np.float64)
    gyp = np.maximum(np.maximum(bb[:, 1] - bc[:, 3], bc[:, 1] - bb[:, 3]), 0).astype(np.float64)
    keep = np.flatnonzero((nb >= 0) & (gxp * gxp + gyp * gyp <= s2))
    if keep.size == 0:
        z = np.zeros(0, np.int64)
        return z, z, np.zeros(0), np.zeros((0, 4))
    a = lo + c_i[keep]
    w = w[keep]
    b = nb[keep].astype(np.int64)
    A, B = _rel_coords(X[a], X[b])
    # exact-safe prefilter 2 (diagonal offsets): projection gap along the site offset direction
    diag = [k for k, (di, dj) in enumerate(plan["offsets"]) if di != 0 and dj != 0]
    if diag:
        off = np.array(plan["offsets"], np.float64) * np.array([plan["gx"], plan["gy"]], np.float64)
        ux, uy = off[w, 0], off[w, 1]
        norm = np.hypot(ux, uy)
        gap = (B[0] * ux + B[1] * uy).min(0) - (A[0] * ux + A[1] * uy).max(0)
        keep = ~np.isin(w, diag) | (gap <= s_db * norm * (1.0 + 1e-9))
        if not keep.all():
            a, b = a[keep], b[keep]
            A, B = np.compress(keep, A, axis=2), np.compress(keep, B, axis=2)
    d, c = _pair_distance(A, B, points=True)
    hit = np.flatnonzero((d < s_db) | (d == 0))
    a, b, d, c = a[hit], b[hit], d[hit], c[hit]
    o = X[a, 0, :].astype(np.float64)
    c += np.concatenate([o, o], 1)
    return a, b, d, c


def _pairs_lattice(flat: FlatPolygons, idx: np.ndarray, n: int, bbox: np.ndarray, s_db: float, rmax: float,
                   threads: int = 2, max_pairs: int = MAX_PAIRS):
    """Lattice fast path over polygons ``idx`` (all strictly convex with ``n`` vertices); None if not a lattice.

    Pairs are produced polygon chunk by polygon chunk (cache-sized, optionally on ``threads`` threads; the
    result is the same as serial, chunks are concatenated in order). The stencil bounds the pairs per polygon;
    the same cap as the tree path (:func:`_cap_pairs`) keeps both paths equal.
    """
    plan = _lattice_plan(bbox, rmax, s_db)
    if plan is None:
        return None
    X = _uniform_view(flat, idx, n)
    P = idx.size
    step = max(16, _PAIR_CHUNK // max(1, len(plan["offsets"])))
    starts = list(range(0, P, step))

    def work(lo):
        return _lattice_chunk(X, bbox, plan, lo, min(P, lo + step), s_db)

    parts = _map_chunks(work, starts, threads)
    n_off = plan["n_offsets"]
    a = np.concatenate([p[0] for p in parts])
    b = np.concatenate([p[1] for p in parts])
    d = np.concatenate([p[2] for p in parts])
    c = np.concatenate([p[3] for p in parts])
    del parts
    swap = a > b
    lo_, hi_ = np.where(swap, b, a), np.where(swap, a, b)
    c[swap] = c[swap][:, [2, 3, 0, 1]]
    lo_, hi_, d, c, capped = _cap_pairs(lo_, hi_, d, c, max_pairs)
    return idx[lo_], idx[hi_], d, c, n_off, capped


def _threads() -> int:
    """Worker threads for the spacing chunks: 2 (numpy releases the GIL), 1 when METALAY_THREADS=1."""
    try:
        return max(1, min(8, int(os.environ.get("METALAY_THREADS", "2"))))
    except ValueError:
        return 2


def _map_chunks(fn, items, threads: int | None = None) -> list:
    """[fn(x) for x in items], on ``threads`` worker threads when there are enough items (same result, in order)."""
    threads = _threads() if threads is None else threads
    if threads > 1 and len(items) > 8:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=threads) as ex:
            return list(ex.map(fn, items))
    return [fn(x) for x in items]


def _counts_of(flat: FlatPolygons, idx: np.ndarray) -> np.ndarray:
    """Vertex counts of polygons ``idx`` (int64), without the count array of the whole mask: one slice when
    ``idx`` is a run of consecutive polygons, else two gathers (``np.diff(flat.start)[idx]``, with less memory)."""
    idx = np.asarray(idx, np.int64)
    if idx.size and int(idx[-1]) - int(idx[0]) + 1 == idx.size and (
            idx.size == 1 or bool(np.all(idx[1:] > idx[:-1]))):
        return np.diff(flat.start[int(idx[0]):int(idx[-1]) + 2])
    return flat.start[idx + 1] - flat.start[idx]


def _distinct(values: np.ndarray) -> np.ndarray:
    """``np.unique(values)``, without sorting when every value is the same (one vertex count per layer)."""
    if values.size and int(values.min()) == int(values.max()):
        return values[:1].copy()
    return np.unique(values)


def _uniform_view(flat: FlatPolygons, idx: np.ndarray, n: int) -> np.ndarray:
    """Vertices of polygons ``idx`` (all with ``n`` vertices) as (m, n, 2) int64.

    A view when ``idx`` is a run of consecutive polygons (one layer's polygons usually are: masks are written layer
    by layer); otherwise a gather of 16-byte vertex records (``np.take`` on a byte view: the same values as
    fancy indexing, about 3x faster), which callers do chunk by chunk so that it stays in cache.
    """
    xy = flat.xy_db
    m = int(idx.size)
    if m == 0:
        return np.zeros((0, n, 2), np.int64)
    first = int(idx[0])
    if int(idx[-1]) - first + 1 == m and (m == 1 or bool(np.all(idx[1:] > idx[:-1]))):
        lo = int(flat.start[first])
        return xy[lo:lo + m * n].reshape(m, n, 2)  # consecutive polygons of n vertices each
    at = flat.start[idx][:, None] + np.arange(n)
    if xy.dtype == np.int64 and xy.ndim == 2 and xy.shape[1] == 2 and xy.flags.c_contiguous:
        return xy.view(np.dtype((np.void, 16))).reshape(-1).take(at).view(np.int64).reshape(m, n, 2)
    return xy[at]


# ----------------------------------------------------------------------------------------------------------------
# The check
# ----------------------------------------------------------------------------------------------------------------

def _violations(kind: str, polygon, other, value, seg_db, db_unit_nm: float) -> Violations:
    polygon = np.asarray(polygon, np.int64)
    other = np.asarray(other, np.int64) if other is not None else np.full(polygon.shape, -1, np.int64)
    value = np.asarray(value, np.float64)
    key_val = -value if kind == "max" else value
    order = np.lexsort((other, polygon, key_val))
    seg = np.asarray(seg_db, np.float64).reshape(-1, 4)[order]
    seg *= db_unit_nm / 1000.0  # database units -> um
    x = seg[:, 0] + seg[:, 2]
    x /= 2
    y = seg[:, 1] + seg[:, 3]
    y /= 2
    return Violations(polygon[order], other[order], value[order], x, y, seg)


def _frame_region(flat: FlatPolygons, frame: tuple[int, int]):
    import shapely

    sel = np.flatnonzero((flat.layer == frame[0]) & (flat.datatype == frame[1]))
    if sel.size == 0:
        return None
    polys = shapely.make_valid(_shapely_polygons(flat, sel))
    u = shapely.union_all(polys)
    parts = shapely.get_parts(u)
    parts = parts[shapely.get_type_id(parts) == 3]
    holes = [shapely.Polygon(r) for p in parts for r in p.interiors]
    if holes:
        return shapely.union_all(holes)
    return shapely.union_all([shapely.Polygon(p.exterior) for p in parts])


def check_mask(mask, rules: RuleSet, *, method: str = "auto", cell: str | None = None,
               max_elements: int | None = None, max_memory_bytes: int | None = None,
               max_pairs: int = MAX_PAIRS) -> RuleReport:
    """Check a mask against a rule set.

    Parameters
    ----------
    mask : str, os.PathLike or FlatPolygons
        A GDSII/OASIS file (read with :func:`metalay.io.gdsread.read_mask`, only the layers the rules use) or
        polygons already read.
    rules : RuleSet
    method : {"auto", "tree", "lattice"}
        Spacing search: "auto" uses the lattice-neighbour stencil when every polygon of the layer is a strictly
        convex polygon with the same vertex count centred on a rectangular grid of sites, else the STRtree;
        "tree" always uses the STRtree; "lattice" is "auto" (the tree remains the fallback).
    cell : str, optional
        Structure to check (default: every top structure).
    max_elements, max_memory_bytes : int, optional
        Limits of the read (:func:`metalay.io.gdsread.read_mask`; default budget: half of the memory this process
        may use).
    max_pairs : int
        Most polygon pairs the spacing/overlap search keeps per layer (:data:`MAX_PAIRS`, or
        :data:`PAIRS_PER_POLYGON` per polygon of the layer when that is more); past it the counts of those two
        rules are lower bounds (``count_is_lower_bound`` in the report).

    Returns
    -------
    RuleReport
        Results in rule-file order (layers) and :data:`RULE_REASONS` order (rules).

    Notes
    -----
    Local width of a polygon: min over (edge e, vertex v not on e) with the foot of the perpendicular from v
    inside e and the segment v-foot inside the polygon of |e x (v - a)| / |e|.  Interior angle at vertex i:
    pi - s * atan2(e_{i-1} x e_i, e_{i-1} . e_i) with s the orientation sign.  Spacing: see
    :func:`polygon_distance_kernel`; the STRtree path uses GEOS distance, which equals it bit for bit on integer
    coordinates (same operation order).  The lattice path drops a pair only when an exact lower bound on its
    distance (bounding-box gap from the site offset and the largest box, then the bounding-box distance, and for
    diagonal offsets the projection gap along the offset) is at least the limit, with a relative slack of 1e-9.
    """
    if method not in ("auto", "tree", "lattice"):
        raise RulesError(f"method = {method!r} is invalid; allowed: auto, tree, lattice")
    keep_freed_memory()  # feature chunks allocate and free arrays of the same sizes: reuse them
    timings: list[tuple[str, float]] = []
    t0 = time.perf_counter()
    sha = None
    if isinstance(mask, FlatPolygons):
        flat, name = mask, "<memory>"
    else:
        name = os.fspath(mask)
        kw = {"max_memory_bytes": max_memory_bytes}
        if max_elements is not None:
            kw["max_elements"] = max_elements
        from concurrent.futures import ThreadPoolExecutor

        # the file hash runs beside the read (hashlib releases the GIL); "sha256" is the wait after the read
        with ThreadPoolExecutor(max_workers=1) as pool:
            fut = pool.submit(file_sha256, name)
            flat = read_mask(name, layers=rules.layer_pairs(), cell=cell, **kw)
            timings.append(("read", time.perf_counter() - t0))
            t1 = time.perf_counter()
            try:
                sha = fut.result()
            except OSError as exc:
                raise MaskReadError(f"{name}: cannot read file for its checksum ({exc.strerror or exc})") from exc
        timings.append(("sha256 (after read)", time.perf_counter() - t1))
    db_unit_nm = flat.db_unit_nm
    results: list[RuleResult] = []
    for lr in rules.layers:
        try:
            results.extend(_check_layer(flat, lr, rules, db_unit_nm, method, timings, max_pairs))
        except MemoryError as exc:  # one line naming what could not be checked, never a traceback
            raise MaskReadError(f"{name}: out of memory checking layer {lr.layer}/{lr.datatype} ({flat.count} "
                                f"polygons, {flat.xy_db.shape[0]} vertices)") from exc
        except Exception as exc:
            if type(exc).__name__ != "GEOSException" or "alloc" not in str(exc):
                raise
            raise MaskReadError(f"{name}: geometry of layer {lr.layer}/{lr.datatype} too complex to check within "
                                f"memory ({exc})") from exc
    return RuleReport(name, sha, flat.db_unit_nm, flat.count, rules.name, tuple(results), tuple(timings))


@dataclass(eq=False)
class _LayerGeometry:
    """Per-polygon features of one (layer, datatype), vectorised; feature rows follow ``poly``.

    Attributes
    ----------
    on_layer : ndarray (P_all,) bool
        Which polygons of the mask are on this layer/datatype.
    layer_polys : ndarray (P,) int64
        Their indices in the mask.
    vertex_counts : ndarray (P,) int64
        Vertices of each of them.
    count_values : ndarray
        The distinct vertex counts.
    degenerate : ndarray int64
        Mask indices of polygons with fewer than 3 vertices.
    poly : ndarray (M,) int64
        Mask index of each measured polygon (3 or more vertices), grouped by vertex count.
    area2, convex, angle_deg, angle_vertex, width_db, bbox_db
        Twice the signed area (database units squared), strict convexity, smallest interior angle (deg, or None when
        no rule needs it) and its vertex, local width (database units; shapely's for non-convex polygons), bounding
        box ``(x0, y0, x1, y1)``.
    r2max_db2 : float
        Largest squared circumradius about the polygon centres (database units squared).
    shapely_results : dict mask index -> dict
        Exact analysis (validity, width, notch, holes) of the non-convex and degenerate polygons.
    shapely_width_seg : dict feature row -> segment
        Width segments found by that analysis.
    """

    on_layer: np.ndarray
    layer_polys: np.ndarray
    vertex_counts: np.ndarray
    count_values: np.ndarray
    degenerate: np.ndarray
    poly: np.ndarray
    area2: np.ndarray
    convex: np.ndarray
    angle_deg: np.ndarray | None
    angle_vertex: np.ndarray
    width_db: np.ndarray
    bbox_db: np.ndarray
    r2max_db2: float = 0.0
    shapely_results: dict = field(default_factory=dict)
    shapely_width_seg: dict = field(default_factory=dict)

    @property
    def n_polygons(self) -> int:
        return int(self.layer_polys.size)


def _layer_geometry(flat: FlatPolygons, lr: LayerRules) -> _LayerGeometry:
    """Features of every polygon on ``lr``'s layer: vectorised for convex polygons (by vertex count, in chunks on
    threads), exact shapely analysis for the others."""
    on_layer = (flat.layer == lr.layer) & (flat.datatype == lr.datatype)
    layer_polys = np.flatnonzero(on_layer)
    vertex_counts = _counts_of(flat, layer_polys)
    count_values = _distinct(vertex_counts) if layer_polys.size else np.zeros(0, np.int64)
    want_angle = lr.min_angle_deg is not None
    by_count = [(int(n), layer_polys[vertex_counts == n] if count_values.size > 1 else layer_polys)
                for n in count_values if n >= 3]
    n_measured = sum(members.size for _, members in by_count)
    poly = by_count[0][1] if len(by_count) == 1 else (
        np.concatenate([members for _, members in by_count]) if by_count else np.zeros(0, np.int64))
    geom = _LayerGeometry(
        on_layer, layer_polys, vertex_counts, count_values, layer_polys[vertex_counts < 3], poly,
        area2=np.zeros(n_measured, np.int64), convex=np.zeros(n_measured, bool),
        angle_deg=np.full(n_measured, np.inf) if want_angle else None,
        angle_vertex=np.zeros(n_measured, np.int64 if count_values.size and count_values.max() >= 128 else np.int8),
        width_db=np.zeros(n_measured), bbox_db=np.zeros((n_measured, 4), np.int64))
    geom.r2max_db2 = _convex_features(flat, geom, by_count, want_angle)
    _shapely_features(flat, lr, geom)
    return geom


def _convex_features(flat: FlatPolygons, geom: _LayerGeometry, by_count, want_angle: bool) -> float:
    """Fill the vectorised features of ``geom`` chunk by chunk (disjoint slices: thread-safe); largest r^2."""
    tasks = []
    pos = 0
    for n, members in by_count:
        whole = members.size == flat.count and flat.xy_db.shape[0] == flat.count * n
        tasks += [(n, members, whole, pos, lo) for lo in range(0, members.size, _chunk_polygons(n))]
        pos += members.size

    def feature_chunk(task):
        n, members, whole, pos, lo = task
        step = _chunk_polygons(n)
        sub = members[lo:lo + step]
        vertices = flat.xy_db.reshape(-1, n, 2)[lo:lo + step] if whole else _uniform_view(flat, sub, n)
        f = _group_features(vertices, want_angle)
        rows = slice(pos + lo, pos + lo + sub.size)
        geom.area2[rows] = f["area2"]
        geom.convex[rows] = f["convex"]
        geom.width_db[rows] = f["width"]
        geom.bbox_db[rows] = f["bbox"]
        geom.angle_vertex[rows] = f["kmin"]
        if want_angle:
            geom.angle_deg[rows] = f["angle"]
        return f["r2max"]

    return max(_map_chunks(feature_chunk, tasks), default=0.0)


_HASH_WEIGHTS = np.random.default_rng(20240613).integers(1, 2 ** 63, size=(2, 8192), dtype=np.int64).astype(
    np.uint64) | np.uint64(1)


def _translation_classes(flat: FlatPolygons, polys: np.ndarray):
    """Polygons that are translates of one another (same vertices relative to the first vertex), as
    (representative, members, offsets): the representative is the member of smallest index, ``offsets`` (m, 2)
    int64 the translation of each member from it. Stacked or arrayed copies of one shape (placements) are then
    analysed once.

    Shapes are grouped by a linear hash of their relative vertices (wrapping uint64 arithmetic) and every member
    is verified against its representative exactly, so a collision only costs time.
    """
    if polys.size == 0:
        return
    counts = _counts_of(flat, polys)
    for n in np.unique(counts).tolist():
        sel = np.sort(polys[counts == n])
        if n < 3 or n > _HASH_WEIGHTS.shape[1] or sel.size == 1:
            for k in sel.tolist():
                yield k, np.array([k]), np.zeros((1, 2), np.int64)
            continue
        h = np.zeros(sel.size, np.uint64)
        step = max(1, (1 << 20) // n)
        for lo in range(0, sel.size, step):  # chunks: bounded temporaries
            X = _uniform_view(flat, sel[lo:lo + step], n)
            rel = (X - X[:, :1]).astype(np.uint64)  # two's complement wrap: a hash, exactness checked below
            h[lo:lo + step] = (rel[:, :, 0] * _HASH_WEIGHTS[0, :n] + rel[:, :, 1] * _HASH_WEIGHTS[1, :n]).sum(1)
        order = np.argsort(h, kind="stable")
        cuts = np.flatnonzero(h[order][1:] != h[order][:-1]) + 1
        for group in np.split(order, cuts):  # distinct shapes (a short axis for placed copies)
            yield from _verified_class(flat, sel[group], n)


def _verified_class(flat: FlatPolygons, members: np.ndarray, n: int):
    """Split ``members`` (ascending, equal hash) into exact translation classes."""
    while members.size:
        rep = members[0]
        ring = _ring(flat, rep)
        X = _uniform_view(flat, members, n)
        off = X[:, 0, :] - ring[0]
        same = np.all(X - off[:, None, :] == ring, axis=(1, 2))
        yield rep, members[same], off[same]
        members = members[~same]


def _translated(res: dict, off) -> dict:
    """The analysis of a polygon moved by ``off`` (database units): locations moved, values kept."""
    ox, oy = float(off[0]), float(off[1])
    out = dict(res)
    if res["where"] is not None:
        out["where"] = (res["where"][0] + ox, res["where"][1] + oy)
    for key in ("width", "notch"):
        if res[key] is not None:
            out[key] = (res[key][0], res[key][1] + np.array([ox, oy, ox, oy]))
    out["holes"] = [(a, (c[0] + ox, c[1] + oy)) for a, c in res["holes"]]
    return out


def _facing_reach_db(lr: LayerRules, db_unit_nm: float) -> float | None:
    """Largest width or notch (database units, with slack) that a rule of ``lr`` can flag; None: unbounded."""
    limits = [v for v in (lr.min_width_nm, lr.min_notch_nm) if v is not None]
    if lr.max_aspect_ratio is not None:
        if lr.max_aspect_ratio <= 0:
            return None
        limits.append(lr.film_height_nm / lr.max_aspect_ratio)
    if not limits or not math.isfinite(max(limits)):
        return None
    return max(limits) / db_unit_nm * (1.0 + 1e-9) + 1.0


def _shapely_features(flat: FlatPolygons, lr: LayerRules, geom: _LayerGeometry) -> None:
    """Exact analysis of the polygons that are not strictly convex or have fewer than 3 vertices."""
    need_shapely = np.concatenate([geom.poly[~geom.convex], geom.degenerate])
    want_width = lr.min_width_nm is not None or lr.max_aspect_ratio is not None
    reach_db = _facing_reach_db(lr, flat.db_unit_nm)
    for rep, members, offsets in _translation_classes(flat, need_shapely):  # each distinct shape analysed once
        res = _shapely_polygon_analysis(_ring(flat, rep), want_width, lr.min_notch_nm is not None, reach_db)
        for k, off in zip(members.tolist(), offsets.tolist()):
            geom.shapely_results[k] = res if off == [0, 0] else _translated(res, off)
    sh_width = {k: r["width"] for k, r in geom.shapely_results.items() if r["width"] is not None}
    if not sh_width:
        return
    ks = np.array(sorted(sh_width), np.int64)
    order = np.argsort(geom.poly, kind="stable")
    at = np.searchsorted(geom.poly, ks, sorter=order)
    ok = at < order.size
    ok[ok] = geom.poly[order[at[ok]]] == ks[ok]
    rows = order[at[ok]]
    geom.width_db[rows] = [sh_width[k][0] for k in ks[ok].tolist()]
    geom.shapely_width_seg = dict(zip(rows.tolist(), (sh_width[k][1] for k in ks[ok].tolist())))


@dataclass
class _LayerCheck:
    """One layer's rules being checked: the polygons, their features and the results so far."""

    flat: FlatPolygons
    lr: LayerRules
    rules: RuleSet
    geom: _LayerGeometry
    db_unit_nm: float
    method: str
    max_pairs: int = MAX_PAIRS
    results: list = field(default_factory=list)
    owned: np.ndarray | None = None  # tiled check: which polygons this tile reports (None: all)

    @property
    def tag(self) -> str:
        return f"{self.lr.layer}/{self.lr.datatype}"

    def n_checked(self, polys=None) -> int:
        """How many of ``polys`` (mask indices; default every polygon of the layer) this check reports on."""
        polys = self.geom.layer_polys if polys is None else np.asarray(polys, np.int64)
        return int(polys.size) if self.owned is None else int(np.count_nonzero(self.owned[polys]))

    def record(self, rule, limit, vio: Violations, checked, method_name="vector", source_key=None, pair_cap=None):
        """Record the result of ``rule`` with its limit, unit, reason and source."""
        src = self.lr.source(source_key) if source_key else ""
        self.results.append(RuleResult(rule, self.lr.layer, self.lr.datatype, float(limit), _UNIT[rule],
                                       _KIND[rule], RULE_REASONS[rule], src, int(checked), method_name, vio,
                                       pair_cap))

    def emit(self, rule, limit, polygon, other, value, seg_db, checked, method_name="vector", source_key=None,
             kind=None, pair_cap=None):
        """Record the violations of ``rule``, sorted worst first (``kind`` "min", "max" or "flag" orders them).

        A tiled check keeps only the violations whose (first) polygon this tile owns: each counted exactly once."""
        if self.owned is not None:
            polygon = np.asarray(polygon, np.int64)
            keep = self.owned[polygon]
            polygon, value = polygon[keep], np.asarray(value)[keep]
            other = None if other is None else np.asarray(other, np.int64)[keep]
            seg_db = np.asarray(seg_db, np.float64).reshape(-1, 4)[keep]
        vio = _violations(kind or _KIND[rule], polygon, other, value, seg_db, self.db_unit_nm)
        self.record(rule, limit, vio, checked, method_name, source_key, pair_cap)

    def bbox_seg(self, rows) -> np.ndarray:
        """Marker segments (degenerate, at the bounding-box centre) of feature rows."""
        b = self.geom.bbox_db[rows].astype(np.float64)
        c = np.stack([(b[:, 0] + b[:, 2]) / 2, (b[:, 1] + b[:, 3]) / 2], 1)
        return np.concatenate([c, c], 1)

    def width_seg(self, rows) -> np.ndarray:
        """Width segments (database units) of feature rows: convex ones recomputed, others from shapely."""
        flat, geom = self.flat, self.geom
        seg = np.zeros((rows.size, 4))
        ks = geom.poly[rows]
        cnt = _counts_of(flat, ks)
        for nn in np.unique(cnt):
            s = np.flatnonzero(cnt == nn)
            if nn >= 3:
                for lo in range(0, s.size, _chunk_polygons(int(nn))):
                    ss = s[lo:lo + _chunk_polygons(int(nn))]
                    seg[ss] = _width_segments(_uniform_view(flat, ks[ss], int(nn)))
        for p, r in enumerate(rows.tolist()):
            if r in geom.shapely_width_seg:
                seg[p] = geom.shapely_width_seg[r]
        return seg


def _rule_width(c: _LayerCheck) -> None:
    g, lr = c.geom, c.lr
    bad = np.flatnonzero(g.width_db < lr.min_width_nm / c.db_unit_nm)
    c.emit("width", lr.min_width_nm, g.poly[bad], None, g.width_db[bad] * c.db_unit_nm, c.width_seg(bad),
           c.n_checked(), source_key="min_width_nm")


def _rule_area(c: _LayerCheck) -> None:
    g, lr = c.geom, c.lr
    area_nm2 = np.abs(g.area2) / 2.0 * c.db_unit_nm * c.db_unit_nm
    bad = np.flatnonzero(area_nm2 < lr.min_area_nm2)
    c.emit("area", lr.min_area_nm2, g.poly[bad], None, area_nm2[bad], c.bbox_seg(bad), c.n_checked(),
           source_key="min_area_nm2")


def _rule_vertices(c: _LayerCheck) -> None:
    g, lr = c.geom, c.lr
    count = _counts_of(c.flat, g.poly)
    bad = np.flatnonzero(count > lr.max_vertices)
    c.emit("vertices", lr.max_vertices, g.poly[bad], None, count[bad], c.bbox_seg(bad), c.n_checked(),
           source_key="max_vertices")


def _rule_grid(c: _LayerCheck) -> None:
    g, lr, flat, db_unit_nm = c.geom, c.lr, c.flat, c.db_unit_nm
    grid_db = lr.grid_nm / db_unit_nm
    step = int(round(grid_db))
    if abs(grid_db - step) > 1e-9 or step < 1:
        raise RulesError(f"layer {c.tag}: grid_nm = {lr.grid_nm} is not a whole multiple of the mask's database "
                         f"unit ({db_unit_nm:g} nm); allowed: k * {db_unit_nm:g} nm")
    off = badv = None
    if step > 1 and g.n_polygons:
        xy = flat.xy_db[np.repeat(g.on_layer, np.diff(flat.start))]
        off = np.abs(xy - np.rint(xy / step).astype(np.int64) * step).max(1)
        pid = np.repeat(g.layer_polys, g.vertex_counts)
        badv = np.flatnonzero(off > 0)
    if badv is None or badv.size == 0:
        c.record("grid", lr.grid_nm, Violations.empty(), c.n_checked(), source_key="grid_nm")
        return
    order = np.lexsort((-off[badv], pid[badv]))  # worst vertex per polygon
    bv = badv[order]
    bv = bv[np.concatenate([[True], pid[bv][1:] != pid[bv][:-1]])]
    pts = xy[bv].astype(np.float64)
    c.emit("grid", lr.grid_nm, pid[bv], None, off[bv] * db_unit_nm, np.concatenate([pts, pts], 1), c.n_checked(),
           source_key="grid_nm", kind="max")


def _rule_angle(c: _LayerCheck) -> None:
    g, lr, flat = c.geom, c.lr, c.flat
    bad = np.flatnonzero(g.angle_deg < lr.min_angle_deg)
    p = flat.xy_db[flat.start[g.poly[bad]] + g.angle_vertex[bad]].astype(np.float64)
    c.emit("angle", lr.min_angle_deg, g.poly[bad], None, g.angle_deg[bad], np.concatenate([p, p], 1),
           c.n_checked(), source_key="min_angle_deg")


def _rule_validity(c: _LayerCheck) -> None:
    bad = [(k, r["where"]) for k, r in sorted(c.geom.shapely_results.items()) if not r["valid"]]
    ks = np.array([k for k, _ in bad], np.int64)
    pts = np.array([w for _, w in bad], np.float64).reshape(-1, 2)
    c.emit("validity", 0, ks, None, np.zeros(ks.size), np.concatenate([pts, pts], 1), c.n_checked())


def _rule_notch(c: _LayerCheck) -> None:
    sh, lr, db_unit_nm = c.geom.shapely_results, c.lr, c.db_unit_nm
    rows = [(k, r["notch"]) for k, r in sorted(sh.items()) if r["notch"] is not None
            and r["notch"][0] * db_unit_nm < lr.min_notch_nm]
    ks = np.array([k for k, _ in rows], np.int64)
    c.emit("notch", lr.min_notch_nm, ks, None, np.array([r[0] * db_unit_nm for _, r in rows]),
           np.array([r[1] for _, r in rows]).reshape(-1, 4), c.n_checked(list(sh)), source_key="min_notch_nm")


def _rule_holes(c: _LayerCheck) -> None:
    sh, lr, db_unit_nm = c.geom.shapely_results, c.lr, c.db_unit_nm
    rows = [(k, a * db_unit_nm * db_unit_nm, centre) for k, r in sorted(sh.items()) for a, centre in r["holes"]
            if a * db_unit_nm * db_unit_nm < lr.min_hole_area_nm2]
    ks = np.array([k for k, _, _ in rows], np.int64)
    pts = np.array([centre for _, _, centre in rows], np.float64).reshape(-1, 2)
    c.emit("hole_area", lr.min_hole_area_nm2, ks, None, np.array([a for _, a, _ in rows]),
           np.concatenate([pts, pts], 1), c.n_checked(list(sh)), source_key="min_hole_area_nm2")


def _rule_aspect(c: _LayerCheck) -> None:
    g, lr = c.geom, c.lr
    ratio = lr.film_height_nm / (g.width_db * c.db_unit_nm)
    bad = np.flatnonzero(ratio > lr.max_aspect_ratio)
    c.emit("aspect_ratio", lr.max_aspect_ratio, g.poly[bad], None, ratio[bad], c.width_seg(bad), c.n_checked(),
           source_key="max_aspect_ratio")


def _rule_straddle(c: _LayerCheck) -> None:
    g, rules, db_unit_nm = c.geom, c.rules, c.db_unit_nm
    if rules.write_field_um is None:
        raise RulesError(f"layer {c.tag}: no_field_straddle = true needs a [write_field] table with size_um")
    size = rules.write_field_um * 1000.0 / db_unit_nm
    smaller_part = np.zeros(g.poly.size)
    for c0 in range(0, smaller_part.size, 1 << 16):
        b = g.bbox_db[c0:c0 + (1 << 16)].astype(np.float64)
        vals = []
        for ax in (0, 1):
            org = rules.write_field_centre_um[ax] * 1000.0 / db_unit_nm - size / 2
            lo, hi = b[:, ax] - org, b[:, ax + 2] - org
            bnd = (np.floor(lo / size) + 1) * size  # first boundary above the lower edge
            vals.append(np.where(hi > bnd, np.minimum(bnd - lo, hi - bnd), 0.0))
        smaller_part[c0:c0 + b.shape[0]] = np.maximum(vals[0], vals[1])
    bad = np.flatnonzero(smaller_part > 0)
    c.emit("field_straddle", rules.write_field_um * 1000.0, g.poly[bad], None, smaller_part[bad] * db_unit_nm,
           c.bbox_seg(bad), c.n_checked(), kind="max")


def _inside_region(c: _LayerCheck, region) -> np.ndarray:
    """Per feature row: the polygon lies inside ``region`` (boundary included)."""
    import shapely

    g, flat = c.geom, c.flat
    b = g.bbox_db
    rb = np.asarray(region.bounds)
    if region.geom_type == "Polygon" and abs(region.area - (rb[2] - rb[0]) * (rb[3] - rb[1])) == 0:
        return (b[:, 0] >= rb[0]) & (b[:, 1] >= rb[1]) & (b[:, 2] <= rb[2]) & (b[:, 3] <= rb[3])
    shapely.prepare(region)
    vsel = np.repeat(g.on_layer, np.diff(flat.start))
    x, y = flat.xy_db[vsel, 0].astype(np.float64), flat.xy_db[vsel, 1].astype(np.float64)
    pin = shapely.contains_xy(region, x, y)
    pin |= shapely.intersects_xy(region.boundary, x, y)
    allin = (np.logical_and.reduceat(pin, np.concatenate([[0], np.cumsum(g.vertex_counts)[:-1]]))
             if g.n_polygons else pin)
    allin_by_idx = dict(zip(g.layer_polys.tolist(), allin.tolist()))
    inside = np.array([allin_by_idx[k] for k in g.poly.tolist()], bool) if g.poly.size else np.zeros(0, bool)
    if abs(region.convex_hull.area - region.area) != 0 and inside.any():
        cand = np.flatnonzero(inside)
        inside[cand] = shapely.covers(region, _shapely_polygons(flat, g.poly[cand]))
    return inside


def _rule_frame(c: _LayerCheck) -> None:
    g = c.geom
    region = _frame_region(c.flat, c.lr.inside_frame)
    bad = np.arange(g.poly.size) if region is None else np.flatnonzero(~_inside_region(c, region))
    c.emit("frame_enclosure", 0, g.poly[bad], None, np.zeros(bad.size), c.bbox_seg(bad), c.n_checked())


def _spacing_pairs(c: _LayerCheck, spacing_db: float):
    """Pairs closer than ``spacing_db``: lattice-neighbour stencil when it applies, else the STRtree path.

    Returns ((a, b, d, seg), method name, capped)."""
    g, flat = c.geom, c.flat
    if (c.method != "tree" and g.degenerate.size == 0 and g.count_values.size == 1 and g.n_polygons >= 2
            and g.convex.all()):
        n = int(g.count_values[0])
        if np.all(g.poly[1:] > g.poly[:-1]):
            got = _pairs_lattice(flat, g.poly, n, g.bbox_db, spacing_db, math.sqrt(g.r2max_db2),
                                 threads=_threads(), max_pairs=c.max_pairs)
        else:
            order = np.argsort(g.poly, kind="stable")
            got = _pairs_lattice(flat, g.poly[order], n, g.bbox_db[order], spacing_db, math.sqrt(g.r2max_db2),
                                 threads=_threads(), max_pairs=c.max_pairs)
        if got is not None:
            return got[:4], f"lattice ({got[4]} neighbour offsets)", got[5]
    valid_idx = g.layer_polys[g.vertex_counts >= 3]
    got = _pairs_tree(flat, valid_idx, spacing_db, c.max_pairs) if valid_idx.size >= 2 else (
        np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), np.zeros((0, 4)), False)
    return got[:4], "strtree", got[4]


def _rule_spacing(c: _LayerCheck) -> None:
    lr = c.lr
    spacing_nm = lr.min_spacing_nm if lr.min_spacing_nm is not None else 0.0
    c = replace(c, max_pairs=max(c.max_pairs, PAIRS_PER_POLYGON * c.geom.n_polygons))
    (a, b, d, seg), name, capped = _spacing_pairs(c, spacing_nm / c.db_unit_nm)

    def part(m):
        return (a, b, d, seg) if m.all() else (a[m], b[m], d[m], seg[m])

    bound = c.max_pairs if capped else None
    if lr.min_spacing_nm is not None:
        pa, pb, pd, pc = part(d > 0)
        c.emit("spacing", lr.min_spacing_nm, pa, pb, pd * c.db_unit_nm, pc, c.n_checked(), name,
               "min_spacing_nm", pair_cap=bound)
        del pa, pb, pd, pc
    if lr.forbid_overlap:
        pa, pb, pd, pc = part(d == 0)
        c.emit("overlap", 0, pa, pb, pd, pc, c.n_checked(), name, pair_cap=bound)


#: The rules of a layer: name, whether ``LayerRules`` switches it on, and the function computing it.
_RULE_STEPS = (
    ("width", lambda lr: lr.min_width_nm is not None, _rule_width),
    ("spacing", lambda lr: lr.min_spacing_nm is not None or lr.forbid_overlap, _rule_spacing),
    ("area", lambda lr: lr.min_area_nm2 is not None, _rule_area),
    ("notch", lambda lr: lr.min_notch_nm is not None, _rule_notch),
    ("hole_area", lambda lr: lr.min_hole_area_nm2 is not None, _rule_holes),
    ("vertices", lambda lr: lr.max_vertices is not None, _rule_vertices),
    ("grid", lambda lr: lr.grid_nm is not None, _rule_grid),
    ("angle", lambda lr: lr.min_angle_deg is not None, _rule_angle),
    ("validity", lambda lr: lr.check_validity, _rule_validity),
    ("aspect_ratio", lambda lr: lr.max_aspect_ratio is not None, _rule_aspect),
    ("field_straddle", lambda lr: lr.no_field_straddle, _rule_straddle),
    ("frame_enclosure", lambda lr: lr.inside_frame is not None, _rule_frame),
)


def _check_layer(flat: FlatPolygons, lr: LayerRules, rules: RuleSet, db_unit_nm: float, method: str,
                 timings: list, max_pairs: int = MAX_PAIRS, owned: np.ndarray | None = None) -> list:
    """All rules of one layer/datatype: polygon features once, then each switched-on rule (in report order).

    ``owned`` (bool per polygon of ``flat``): report only violations and checked counts of these polygons (a tile
    of :mod:`metalay.checks.rules_stream`); None reports every polygon."""
    tag = f"{lr.layer}/{lr.datatype}"
    t0 = time.perf_counter()
    check = _LayerCheck(flat, lr, rules, _layer_geometry(flat, lr), db_unit_nm, method, max_pairs, owned=owned)
    timings.append((f"geometry {tag}", time.perf_counter() - t0))
    for name, switched_on, rule in _RULE_STEPS:  # loop over rules (a short axis)
        if switched_on(lr):
            t = time.perf_counter()
            rule(check)
            timings.append((f"{name} {tag}", time.perf_counter() - t))
    rank = {r: i for i, r in enumerate(_RULE_ORDER)}
    return sorted(check.results, key=lambda r: rank[r.rule])


# ----------------------------------------------------------------------------------------------------------------
# Marker GDSII
# ----------------------------------------------------------------------------------------------------------------

def write_marker_gds(report: RuleReport, flat: FlatPolygons, path, *, marker_layer: int = 1000,
                     max_markers: int = 1_000_000, marker_half_width_nm: float = 5.0) -> dict:
    """Write a GDSII file with one marker polygon per violation plus the polygons involved.

    Markers go on ``marker_layer`` with datatype = 1 + the rule's index in :data:`RULE_REASONS` (so a viewer can
    toggle rules separately); involved polygons keep their own layer/datatype.  Segment rules get a thin rectangle
    along the measured segment, point rules a small square, polygon rules a copy of the polygon.  At most
    ``max_markers`` markers per rule (worst first).  Written atomically; returns counts.
    """
    from metalay.io.writer import GdsStream

    db_unit_nm = flat.db_unit_nm
    hw = max(1.0, marker_half_width_nm / db_unit_nm)
    involved = []
    per_n: dict[int, list] = {}
    n_markers = 0
    rank = {r: i for i, r in enumerate(_RULE_ORDER)}
    for res in report.results:
        v = res.violations
        m = min(v.count, max_markers)
        if m == 0:
            continue
        dt = 1 + rank[res.rule]
        involved.append(v.polygon[:m])
        involved.append(v.other[:m][v.other[:m] >= 0])
        style = _MARKER[res.rule]
        if style == "polygon":
            sub = flat.select(np.isin(np.arange(flat.count), v.polygon[:m]))
            for n in np.unique(np.diff(sub.start)):
                k = np.flatnonzero(np.diff(sub.start) == n)
                per_n.setdefault(int(n), []).append((marker_layer, dt,
                                                     sub.xy_db[sub.start[k][:, None] + np.arange(n)]))
        else:
            seg = v.segment_um[:m] / (db_unit_nm / 1000.0)
            p0, p1 = seg[:, :2], seg[:, 2:]
            dvec = p1 - p0
            ln = np.hypot(dvec[:, 0], dvec[:, 1])
            u = np.where(ln[:, None] > 0, dvec / np.maximum(ln, 1e-300)[:, None], [1.0, 0.0])
            nrm = np.stack([-u[:, 1], u[:, 0]], 1)
            if style == "point":
                p0, p1 = p0 - u * hw, p1 + u * hw
            else:
                p0, p1 = p0 - u * (ln[:, None] == 0) * hw, p1 + u * (ln[:, None] == 0) * hw
            quad = np.stack([p0 - nrm * hw, p1 - nrm * hw, p1 + nrm * hw, p0 + nrm * hw], 1)
            per_n.setdefault(4, []).append((marker_layer, dt, np.rint(quad).astype(np.int64)))
        n_markers += m
    inv = np.unique(np.concatenate(involved)) if involved else np.zeros(0, np.int64)
    ctx = flat.select(np.isin(np.arange(flat.count), inv))
    with GdsStream(path, "MARKERS", db_unit_nm=db_unit_nm) as gs:
        cnt = np.diff(ctx.start)
        for n in np.unique(cnt):
            k = np.flatnonzero(cnt == n)
            X = ctx.xy_db[ctx.start[k][:, None] + np.arange(n)]
            key = ctx.layer[k].astype(np.int64) * 65536 + ctx.datatype[k]
            for kk in np.unique(key):
                s = key == kk
                gs.boundaries(int(kk // 65536), int(kk % 65536), X[s])
        for n in sorted(per_n):
            for layer, dt, X in per_n[n]:
                gs.boundaries(layer, dt, X)
    return {"markers": int(n_markers), "context_polygons": int(inv.size), "marker_layer": marker_layer}


# ----------------------------------------------------------------------------------------------------------------
# compile integration
# ----------------------------------------------------------------------------------------------------------------

def compile_check(path, library, design, *, max_listed: int = 20) -> dict:
    """Run the library's default rules on a mask ``compile`` just wrote; return a JSON-ready dict.

    Film height = thickness of the library's first patterned layer; frame enclosure on the design's frame layer
    when the mask has one.
    """
    film = None
    for layer in getattr(library, "layers", ()):
        if layer.get("patterned"):
            film = float(layer.get("thickness_nm"))
            break
    try:
        struct_layer = design.mask.layer("structures")
    except (AttributeError, KeyError):
        struct_layer = (1, 0)
    rules = rules_from_library(dict(library.rules), layer=struct_layer, film_height_nm=film)
    report = check_mask(path, rules)
    d = report.to_dict(max_listed=max_listed)
    d["status"] = "clean" if report.clean else "violations"
    d["violations"] = report.total_violations
    d["timings_s"] = {k: round(v, 3) for k, v in report.timings_s}
    d["summary"] = report.summary_lines()
    return d
