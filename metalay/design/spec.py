"""Design files (TOML): parse once, validate at the edge, return frozen dataclasses.

Every error is one line naming the file, the key (dotted path), the value and the allowed range or options.
The full key reference is in the README ("Design file reference").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path

from metalay.design.lattice import Aperture, Lattice
from metalay.design.limits import DEFAULT_LIMITS, Limits
from metalay.design.logpolar import parse_sorter_term
from metalay.design.phase import (
    ENCODINGS,
    PHASE_TERM_KINDS,
    Axicon,
    Channel,
    Lens,
    Multiplex,
    QPlate,
    Tilt,
    Vortex,
    load_phase_map,
)
from metalay.design.side import LIT_FROM
from metalay.errors import DesignError
from metalay.validate import TomlTable, load_toml

__all__ = ["Design", "MaskSettings", "WriteFieldSettings", "MarkSettings", "CheckSettings", "load_design",
           "parse_design", "DEFAULT_LAYERS", "FAIL_AT", "SPIN_TABLES"]

#: Default (layer, datatype) per purpose.
DEFAULT_LAYERS = {"structures": (1, 0), "frame": (2, 0), "label": (3, 0), "marks": (4, 0)}
_HIERARCHY = ("flat", "levels")
_FORMATS = ("gds", "oas")
_SHAPES = ("circle", "square", "rectangle", "annulus")
_LATTICES = ("square", "hexagonal")
_MAX_SITES = 2_000_000_000


@dataclass(frozen=True)
class WriteFieldSettings:
    """E-beam write fields: size, grid origin, what to do with elements that straddle a boundary."""

    size_um: tuple[float, float]
    origin_um: tuple[float, float] = (0.0, 0.0)
    straddle: str = "shift"
    max_shift_nm: float = 50.0
    cell_per_field: bool = False


@dataclass(frozen=True)
class MarkSettings:
    """Alignment marks outside the frame."""

    kind: str = "cross"
    size_um: float = 100.0
    line_width_um: float = 10.0
    gap_um: float = 20.0
    positions_um: tuple | None = None


@dataclass(frozen=True)
class MaskSettings:
    """How the mask is written (database unit, layers, hierarchy, rotation levels, formats, frame, label)."""

    db_unit_nm: float = 1.0
    layers: tuple[tuple[str, tuple[int, int]], ...] = tuple(DEFAULT_LAYERS.items())
    hierarchy: str = "flat"
    rotation_levels: int = 0
    formats: tuple[str, ...] = ("gds", "oas")
    cell: str | None = None
    frame_margin_um: float = 10.0
    frame_width_um: float = 5.0
    label: bool = True
    label_height_um: float = 20.0
    bias_nm: float = 0.0
    bias_corners: str = "sharp"
    tone: str = "structures"
    complement_region: str = "aperture"
    complement_band_rows: int = 64
    write_field: WriteFieldSettings | None = None
    marks: MarkSettings | None = None
    dose_datatypes: tuple[tuple[str, int], ...] = ()

    def layer(self, purpose: str) -> tuple[int, int]:
        return dict(self.layers)[purpose]


@dataclass(frozen=True)
class CheckSettings:
    """Which checks ``compile`` runs on the written mask, their verdict thresholds and the exit-code level."""

    rules: bool = True
    fail_on_violations: bool = False
    optics: bool = True
    fail_at: str = "fail"
    limits: Limits = Limits()
    bias_response: str = "as-written"
    bias_harmonics: int | None = None
    cell_cache: str | None = None


#: Values of ``checks.bias_response``: the optical check of a biased mask uses each cell at the size as written
#: (a library cell of that size, else solved on demand), or its nominal response (the process removes the bias).
BIAS_RESPONSES = ("as-written", "nominal")


@dataclass(frozen=True)
class Design:
    """A validated design."""

    name: str
    wavelength_nm: float
    sigma: int
    terms: tuple
    aperture: Aperture
    lattice: Lattice
    library: str
    mask: MaskSettings
    checks: CheckSettings
    source_path: str = "<memory>"
    raw: dict = field(default_factory=dict, compare=False, repr=False)
    lit_from: str | None = None
    spin_terms: tuple = ()  # spin-decoupled designs: ((+1, terms for spin +1), (-1, terms for spin -1)); else ()

    @property
    def spin_decoupled(self) -> bool:
        """True for a design with its own phase per input spin (``[[phase_spin_plus]]``, ``[[phase_spin_minus]]``)."""
        return bool(self.spin_terms)

    def spin_targets(self) -> tuple:
        """``((sigma, terms), ...)``: the phase terms written for each input spin the design specifies.

        A geometric-phase design writes one spin (``((sigma, terms),)``); a spin-decoupled design writes both
        (``((+1, terms_plus), (-1, terms_minus))``).
        """
        return self.spin_terms if self.spin_terms else ((self.sigma, self.terms),)


def load_design(path: str | Path) -> Design:
    """Read and validate a design file.

    Raises
    ------
    DesignError
        With a one-line message naming the file, key, value and allowed range.
    """
    path = Path(path)
    where = str(path)
    data = load_toml(path, what="design file", error=DesignError)
    return parse_design(data, where=where, base_dir=path.parent)


def parse_design(data: dict, *, where: str = "<memory>", base_dir: str | Path = ".") -> Design:
    """Validate an already-parsed TOML document (see :func:`load_design`).

    Tables are read in file-reference order (design, phase, aperture, lattice, mask, checks, routes), each by its
    own ``_parse_*`` stage through :class:`metalay.validate.TomlTable`; the first invalid value stops with a
    :class:`~metalay.errors.DesignError` naming the file, the dotted key, the value and the allowed range.
    """
    base_dir = Path(base_dir)
    top = TomlTable(data, where)
    decoupled = top.has(SPIN_TABLES[0]) or top.has(SPIN_TABLES[1])
    name, wavelength_nm, sigma, library, lit_from = _parse_design_table(top.table("design"), base_dir,
                                                                        spin_required=not decoupled)
    spin_terms = _parse_spin_terms(top, base_dir, wavelength_nm) if decoupled else ()
    terms = () if decoupled else tuple(_parse_term(t, base_dir, wavelength_nm) for t in top.tables("phase"))
    aperture = _parse_aperture(top.table("aperture"))
    lattice = _parse_lattice(top.table("lattice"), aperture)
    mask = _parse_mask(top.table("mask", {}))
    checks = _parse_checks(top.table("checks", {}), base_dir)
    top.raw("routes", {})  # fabrication-route settings, validated by metalay.routes
    top.check_unknown()
    return Design(name=name, wavelength_nm=float(wavelength_nm), sigma=int(sigma), terms=terms, aperture=aperture,
                  lattice=lattice, library=library, mask=mask, checks=checks, source_path=where, raw=data,
                  lit_from=lit_from, spin_terms=spin_terms)


def _parse_design_table(d: TomlTable, base_dir: Path, *, spin_required: bool = True):
    """``[design]``: name, wavelength, input spin, library (a relative library path is taken from the file's
    folder). A spin-decoupled design (``spin_required=False``) writes both spins and has no ``input_spin``."""
    name = d.string("name")
    if (not name or len(name) > 64 or name.startswith(".")
            or not all(c.isascii() and (c.isalnum() or c in "-_.") for c in name)):
        d.fail("name", name, "use 1 to 64 ASCII letters, digits, '-', '_' and '.', not starting with '.' "
               "(the name becomes file and cell names)")
    wavelength_nm = d.number("wavelength_nm", lo=100.0, hi=20000.0)
    if not spin_required:
        if d.has("input_spin"):
            d.fail("input_spin", d.raw("input_spin"), "not used by a spin-decoupled design: [[phase_spin_plus]] and "
                   "[[phase_spin_minus]] give the phase of each input spin (remove the key)")
        sigma = 1
    else:
        sigma = d.number("input_spin", integer=True)
    if sigma not in (1, -1):
        d.fail("input_spin", sigma, "allowed values are 1 (spin +1) and -1 (spin -1)")
    library = d.string("library")
    if not library:
        d.fail("library", library, "give a bundled library name or a path to a *.library.json file")
    if library.endswith(".json") and not Path(library).is_absolute():
        library = str((base_dir / library))
    lit_from = d.string("lit_from", None, options=LIT_FROM)
    d.check_unknown()
    return name, wavelength_nm, sigma, library, lit_from


#: Values of ``checks.fail_at``: the verdict level from which ``metalay compile`` exits 1.
FAIL_AT = ("fail", "warn", "never")


def _parse_checks(c: TomlTable, base_dir: Path) -> CheckSettings:
    """``[checks]``: which checks run, the exit-code level, the verdict thresholds (``[checks.limits]``) and how
    the optical check treats a biased mask (``bias_response``, ``bias_harmonics``, ``cell_cache``)."""
    cache = c.string("cell_cache", None)
    checks = CheckSettings(rules=c.boolean("rules", True), fail_on_violations=c.boolean("fail_on_violations", False),
                           optics=c.boolean("optics", True), fail_at=c.string("fail_at", "fail", options=FAIL_AT),
                           limits=_parse_limits(c.table("limits")) if c.has("limits") else Limits(),
                           bias_response=c.string("bias_response", "as-written", options=BIAS_RESPONSES),
                           bias_harmonics=c.number("bias_harmonics", None, lo=0, hi=40, integer=True),
                           cell_cache=None if cache is None else str(base_dir / cache))
    c.check_unknown()
    return checks


def _parse_limits(lt: TomlTable) -> Limits:
    """``[checks.limits]``: per figure ``{warn_below, fail_below}`` (or ``_above``), overriding the defaults."""
    items = []
    for lim in DEFAULT_LIMITS:  # a handful of figures (short axis)
        if not lt.has(lim.key):
            items.append(lim)
            continue
        t = lt.table(lim.key)
        w_name, f_name = lim.words
        hi = 1e6 if lim.unit in ("dB", "deg", "count") else 1.0
        warn = float(t.number(w_name, lim.warn, lo=0.0, hi=hi))
        fail = float(t.number(f_name, lim.fail, lo=0.0, hi=hi))
        if (fail > warn) if lim.higher_is_better else (fail < warn):
            t.fail(f_name, fail, f"must be {'<=' if lim.higher_is_better else '>='} {w_name} = {warn:g} "
                   f"(unit {lim.unit})")
        t.check_unknown()
        items.append(replace(lim, warn=warn, fail=fail))
    lt.check_unknown()
    return Limits(tuple(items))


#: The tables of a spin-decoupled design: the phase terms written onto input spin +1 and onto input spin -1.
SPIN_TABLES = ("phase_spin_plus", "phase_spin_minus")


def _parse_spin_terms(top: TomlTable, base_dir: Path, wavelength_nm: float) -> tuple:
    """``[[phase_spin_plus]]`` and ``[[phase_spin_minus]]``: the phase terms of each input spin (same keys as
    ``[[phase]]``); both are required, and ``[[phase]]`` is not allowed beside them."""
    if top.has("phase"):
        top.fail("phase", "[[phase]]", "not allowed in a spin-decoupled design: give the phase of each input spin in "
                 "[[phase_spin_plus]] and [[phase_spin_minus]] (or only [[phase]] for a geometric-phase design)")
    for key in SPIN_TABLES:
        if not top.has(key):
            raise DesignError(f"{top.where}: missing key '{key}': a spin-decoupled design needs both "
                              f"[[{SPIN_TABLES[0]}]] and [[{SPIN_TABLES[1]}]] (the phase for input spin +1 and -1)")
    return tuple((sigma, tuple(_parse_term(t, base_dir, wavelength_nm) for t in top.tables(key)))
                 for sigma, key in ((1, SPIN_TABLES[0]), (-1, SPIN_TABLES[1])))


def _parse_aperture(a: TomlTable) -> Aperture:
    """``[aperture]``: circle, annulus, square or rectangle with its sizes in micrometres."""
    shape = a.string("shape", options=_SHAPES)
    if shape == "circle":
        aperture = Aperture(shape, diameter_um=a.number("diameter_um", lo=0, lo_open=True, hi=1e5))
    elif shape == "annulus":
        outer = a.number("diameter_um", lo=0, lo_open=True, hi=1e5)
        inner = a.number("inner_diameter_um", lo=0, lo_open=True, hi=1e5)
        if inner >= outer:
            a.fail("inner_diameter_um", inner, f"must be smaller than diameter_um = {outer}")
        aperture = Aperture(shape, diameter_um=outer, inner_diameter_um=inner)
    elif shape == "square":
        aperture = Aperture(shape, width_um=a.number("width_um", lo=0, lo_open=True, hi=1e5))
    else:
        aperture = Aperture(shape, width_um=a.number("width_um", lo=0, lo_open=True, hi=1e5),
                            height_um=a.number("height_um", lo=0, lo_open=True, hi=1e5))
    a.check_unknown()
    return aperture


def _parse_lattice(lt: TomlTable, aperture: Aperture) -> Lattice:
    """``[lattice]``: kind and period; the aperture must hold at least one cell and at most ``_MAX_SITES``."""
    lattice = Lattice(lt.string("kind", options=_LATTICES), lt.number("period_nm", lo=10.0, hi=100000.0))
    lt.check_unknown()
    min_extent_um = 2 * min(aperture.half_extent_um)
    if aperture.shape == "annulus":
        min_extent_um = (aperture.diameter_um - aperture.inner_diameter_um) / 2
    if min_extent_um < lattice.period_um:
        raise DesignError(f"{lt.where}: aperture ({min_extent_um:g} um across) is smaller than one unit cell "
                          f"(lattice.period_nm = {lattice.period_nm:g}); allowed: aperture >= one period")
    est_sites = _estimated_sites(aperture, lattice)
    if est_sites > _MAX_SITES:
        raise DesignError(f"{lt.where}: aperture and lattice give about {est_sites:.3g} sites; allowed up to "
                          f"{_MAX_SITES:.0e}")
    return lattice


def _parse_layers(m: TomlTable) -> dict:
    """``[mask.layers]``: ``[layer, datatype]`` per purpose over :data:`DEFAULT_LAYERS`."""
    layers = dict(DEFAULT_LAYERS)
    if m.has("layers"):
        lr = m.table("layers")
        for purpose in DEFAULT_LAYERS:
            if lr.has(purpose):
                v = lr.raw(purpose)
                if (not isinstance(v, list) or len(v) != 2 or not all(isinstance(x, int) and not isinstance(x, bool)
                                                                       and 0 <= x <= 255 for x in v)):
                    lr.fail(purpose, v, "expected [layer, datatype], integers 0..255")
                layers[purpose] = (v[0], v[1])
        lr.check_unknown()
    return layers


def _parse_write_field(wf: TomlTable) -> WriteFieldSettings:
    """``[mask.write_field]``: size, grid origin, straddle handling."""
    size = wf.raw("size_um")
    if isinstance(size, (int, float)) and not isinstance(size, bool):
        size = [size, size]
    if (not isinstance(size, list) or len(size) != 2 or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and 0.1 <= v <= 1e5 for v in size)):
        wf.fail("size_um", wf.data.get("size_um"), "expected a number or [width, height], 0.1..1e5 um")
    origin = wf.raw("origin_um", [0.0, 0.0])
    if (not isinstance(origin, list) or len(origin) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in origin)):
        wf.fail("origin_um", origin, "expected [x, y] in um")
    write_field = WriteFieldSettings(
        (float(size[0]), float(size[1])), (float(origin[0]), float(origin[1])),
        wf.string("straddle", "shift", options=("shift", "shift-or-drop", "drop", "keep")),
        float(wf.number("max_shift_nm", 50.0, lo=0.0, hi=1e4)),
        wf.boolean("cell_per_field", False))
    wf.check_unknown()
    return write_field


def _parse_marks(mk: TomlTable) -> MarkSettings:
    """``[mask.marks]``: kind, size, bar width, gap, optional explicit positions."""
    positions = mk.raw("positions_um", None)
    if positions is not None and (not isinstance(positions, list) or not positions or not all(
            isinstance(p, list) and len(p) == 2 and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                        for v in p) for p in positions)):
        mk.fail("positions_um", positions, "expected a list of [x, y] positions in um")
    size_um = float(mk.number("size_um", 100.0, lo=1.0, hi=1e4))
    line_um = float(mk.number("line_width_um", 10.0, lo=0.1, hi=1e4))
    if line_um >= size_um:
        mk.fail("line_width_um", line_um, f"must be smaller than size_um = {size_um:g}")
    marks = MarkSettings(mk.string("kind", "cross", options=("cross", "square")), size_um, line_um,
                         float(mk.number("gap_um", 20.0, lo=0.0, hi=1e5)),
                         tuple((float(a), float(b)) for a, b in positions) if positions else None)
    mk.check_unknown()
    return marks


def _parse_mask(m: TomlTable) -> MaskSettings:
    """``[mask]``: database unit, layers, hierarchy, rotation levels, formats, frame, label, process settings."""
    db_unit_nm = m.number("db_unit_nm", 1.0, lo=0.001, hi=100.0)
    layers = _parse_layers(m)
    hierarchy = m.string("hierarchy", "flat", options=_HIERARCHY)
    levels = m.number("rotation_levels", 0, lo=0, hi=4096, integer=True)
    if levels == 1:
        m.fail("rotation_levels", levels, "allowed 0 (exact rotation per site) or 2..4096")
    if hierarchy == "levels" and levels == 0:
        m.fail("hierarchy", hierarchy, "'levels' needs mask.rotation_levels >= 2")
    formats = m.raw("formats", ["gds", "oas"])
    if (not isinstance(formats, list) or not formats or any(f not in _FORMATS for f in formats)
            or len(set(formats)) != len(formats)):
        m.fail("formats", formats, f"expected a non-empty list of distinct values from {list(_FORMATS)}")
    write_field = _parse_write_field(m.table("write_field")) if m.has("write_field") else None
    marks = _parse_marks(m.table("marks")) if m.has("marks") else None
    dose = ()
    if m.has("dose_datatypes"):
        dd = m.table("dose_datatypes")
        for key in sorted(dd.data):
            dd.number(key, integer=True, lo=0, hi=255)
        dose = tuple(sorted((k, int(v)) for k, v in dd.data.items()))
    mask = MaskSettings(
        db_unit_nm=float(db_unit_nm), layers=tuple(layers.items()), hierarchy=hierarchy, rotation_levels=levels,
        formats=tuple(f for f in _FORMATS if f in formats), cell=m.string("cell", None),
        frame_margin_um=float(m.number("frame_margin_um", 10.0, lo=0.0, hi=1e4)),
        frame_width_um=float(m.number("frame_width_um", 5.0, lo=0.0, lo_open=True, hi=1e3)),
        label=m.boolean("label", True),
        label_height_um=float(m.number("label_height_um", 20.0, lo=0.5, hi=1e4)),
        bias_nm=float(m.number("bias_nm", 0.0, lo=-200.0, hi=200.0)),
        bias_corners=m.string("bias_corners", "sharp", options=("sharp", "chamfer")),
        tone=m.string("tone", "structures", options=("structures", "complement")),
        complement_region=m.string("complement_region", "aperture", options=("aperture", "frame")),
        complement_band_rows=m.number("complement_band_rows", 64, lo=1, hi=100000, integer=True),
        write_field=write_field, marks=marks, dose_datatypes=dose,
    )
    if mask.tone == "complement" and mask.hierarchy != "flat":
        m.fail("tone", mask.tone, "'complement' needs mask.hierarchy = 'flat'")
    if (write_field is not None and write_field.cell_per_field
            and (mask.hierarchy != "flat" or mask.tone != "structures")):
        raise DesignError(f"{m.where}: key 'mask.write_field.cell_per_field' = true: needs mask.hierarchy = 'flat' "
                          "and mask.tone = 'structures'")
    m.check_unknown()
    return mask


def _estimated_sites(aperture: Aperture, lattice: Lattice) -> float:
    from metalay.design.lattice import estimated_sites

    return estimated_sites(aperture, lattice)


def _parse_term(r: TomlTable, base_dir: Path, wavelength_nm: float):
    kind = r.string("kind", options=PHASE_TERM_KINDS)
    if kind == "vortex":
        term = Vortex(r.number("charge", integer=True, lo=-1000, hi=1000),
                      float(r.number("center_x_um", 0.0)), float(r.number("center_y_um", 0.0)))
    elif kind == "tilt":
        term = _parse_tilt(r, wavelength_nm)
    elif kind == "lens":
        term = Lens(float(r.number("focal_length_um", lo=0, lo_open=True, hi=1e7)),
                    float(r.number("medium_index", 1.0, lo=1.0, hi=5.0)),
                    float(r.number("center_x_um", 0.0)), float(r.number("center_y_um", 0.0)))
    elif kind == "axicon":
        if r.has("numerical_aperture"):
            na = r.number("numerical_aperture", lo=0, lo_open=True, hi=0.99)
            term = Axicon(math.degrees(math.asin(na)))
        else:
            term = Axicon(float(r.number("half_angle_deg", lo=0, lo_open=True, hi=80.0)))
    elif kind == "qplate":
        q = r.number("q", lo=-100, hi=100)
        if abs(2 * q - round(2 * q)) > 1e-12:
            r.fail("q", q, "must be a multiple of 1/2 (the pattern must be continuous around the centre)")
        term = QPlate(float(q), float(r.number("alpha0_deg", 0.0, lo=-360, hi=360)))
    elif kind == "mode_sorter":
        term = parse_sorter_term(r, wavelength_nm)
    elif kind == "multiplex":
        parsed = []
        for cr in r.tables("channels", max_count=64):
            parsed.append(Channel(cr.number("charge", integer=True, lo=-1000, hi=1000),
                                  float(cr.number("angle_deg", lo=0.0, hi=89.0)),
                                  float(cr.number("azimuth_deg", 0.0, lo=-360.0, hi=360.0)),
                                  float(cr.number("weight", 1.0, lo=0.0, lo_open=True, hi=1e6)),
                                  float(cr.number("offset_deg", 0.0, lo=-360.0, hi=360.0))))
            cr.check_unknown()
        term = Multiplex(tuple(parsed), r.string("encoding", "given", options=ENCODINGS[:2]),
                         float(r.number("encoding_spread_db", 0.5, lo=0.05, hi=6.0)),
                         int(r.number("encoding_evaluations", 1200, lo=50, hi=20000, integer=True)))
    else:  # map
        file = r.string("file")
        extent = r.raw("extent_um")
        if (not isinstance(extent, list) or len(extent) != 4
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in extent)):
            r.fail("extent_um", extent, "expected [x_min, x_max, y_min, y_max] in micrometres")
        path = Path(file) if Path(file).is_absolute() else base_dir / file
        term = load_phase_map(path, extent_um=extent, where=f"{r.where}: key '{r.key('file')}'")
    r.check_unknown()
    return term


def _parse_tilt(r: TomlTable, wavelength_nm: float) -> Tilt:
    azimuth = float(r.number("azimuth_deg", 0.0, lo=-360.0, hi=360.0))
    if r.has("carrier_period_um"):
        period_um = r.number("carrier_period_um", lo=0, lo_open=True, hi=1e6)
        s = wavelength_nm * 1e-3 / period_um
        if s >= 1:
            r.fail("carrier_period_um", period_um, f"must exceed the wavelength ({wavelength_nm * 1e-3:g} um) "
                   "for a propagating order")
        return Tilt(math.degrees(math.asin(s)), azimuth)
    return Tilt(float(r.number("angle_deg", lo=0.0, hi=89.0)), azimuth)
