"""Unit-cell libraries: the cells a mask may use, their process rules and (optionally) their optical responses.

A library is two files side by side (format version 1, documented in ``libraries/FORMAT.md``):

``<name>.library.json``
    Metadata: mode (transmission or reflection), phase mechanism (geometric or propagation), design wavelength,
    lattice period and type it was characterised at, material stack, default process rules, provenance and the
    list of cells with their dimensions.
``<name>.responses.csv``
    Optional complex zeroth-order responses ``t_long``, ``t_short`` per cell and wavelength, plus the total power
    leaving on the output side for each principal polarisation.

Bundled libraries live in the repository's top-level ``libraries/`` folder, installed as the package
``metalay.libraries`` so that they are found from any working directory.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np

from metalay.errors import LibraryError
from metalay.util.atomic import atomic_write_bytes

__all__ = [
    "CELL_KINDS",
    "CellSpec",
    "CellLibrary",
    "load_library",
    "save_library",
    "bundled_library_names",
    "stack_side",
    "library_to_json",
    "responses_to_csv",
    "check_physical",
    "PASSIVITY_TOLERANCE",
]

FORMAT_NAME = "metalay.cell-library"
FORMAT_VERSION = 1
CSV_HEADER = ("cell_id", "wavelength_nm", "t_long_re", "t_long_im", "t_short_re", "t_short_im",
              "power_long", "power_short")

#: Dimension keys each cell kind needs (all in nanometres).
CELL_KINDS: dict[str, tuple[str, ...]] = {
    "nanofin": ("length_nm", "width_nm"),
    "elliptic_pillar": ("major_nm", "minor_nm"),
    "round_pillar": ("diameter_nm",),
    "slot": ("length_nm", "width_nm"),
}

_MODES = ("transmission", "reflection")
#: Values of a library's ``lit_from`` (the same as the design key ``design.lit_from``).
LIT_FROM = ("substrate", "structures")
_OPEN_MEDIA = ("air", "vacuum")
_MECHANISMS = ("geometric", "propagation", "spin_decoupled")
#: Cell kinds a spin-decoupled library may hold (anisotropic: a half-wave cell needs two principal axes).
_DECOUPLED_KINDS = ("nanofin", "elliptic_pillar")
_LATTICES = ("square", "hexagonal")


@dataclass(frozen=True)
class CellSpec:
    """One cell of a library.

    Attributes
    ----------
    id : str
        Identifier, unique in the library.
    kind : str
        One of :data:`CELL_KINDS`.
    layer : str
        Name of the patterned layer of the stack the cell belongs to.
    dims_nm : tuple of (name, value)
        Dimensions in nanometres, e.g. ``(("length_nm", 250.0), ("width_nm", 85.0))``.
    """

    id: str
    kind: str
    layer: str
    dims_nm: tuple[tuple[str, float], ...]

    def dim(self, name: str) -> float:
        """Value of dimension ``name`` in nm."""
        for key, value in self.dims_nm:
            if key == name:
                return value
        raise KeyError(name)

    @property
    def dims(self) -> dict[str, float]:
        return dict(self.dims_nm)

    @property
    def min_feature_nm(self) -> float:
        """Smallest in-plane dimension of the cell (its critical dimension)."""
        return min(v for _, v in self.dims_nm)

    @property
    def max_extent_nm(self) -> float:
        """Largest in-plane dimension (length of the long axis)."""
        return max(v for _, v in self.dims_nm)


@dataclass(frozen=True, eq=False)
class CellLibrary:
    """A loaded cell library (see the module docstring for the file format)."""

    name: str
    description: str
    mode: str
    phase_mechanism: str
    design_wavelength_nm: float
    period_nm: float
    lattice: str
    incident_medium: str
    exit_medium: str
    layers: tuple
    rules: dict
    provenance: dict
    cells: tuple[CellSpec, ...]
    wavelengths_nm: np.ndarray | None = None
    t_long: np.ndarray | None = None
    t_short: np.ndarray | None = None
    power_long: np.ndarray | None = None
    power_short: np.ndarray | None = None
    source_path: str | None = None
    sha256: str = ""
    extra: dict = field(default_factory=dict)
    lit_from: str | None = None

    @property
    def side(self) -> str | None:
        """The side the responses were computed for: ``"substrate"`` (light arrives through the substrate) or
        ``"structures"`` (light arrives onto the patterned face); None when the library cannot tell.

        The file's ``lit_from`` key when present; otherwise derived from the stack (:func:`stack_side`).
        """
        if self.lit_from is not None:
            return self.lit_from
        return stack_side(self.mode, self.incident_medium, self.exit_medium)

    @property
    def has_responses(self) -> bool:
        return self.t_long is not None and self.wavelengths_nm is not None

    def cell_index(self, cell_id: str) -> int:
        for k, cell in enumerate(self.cells):
            if cell.id == cell_id:
                return k
        raise LibraryError(f"{self.source_path or self.name}: no cell with id {cell_id!r}; "
                           f"cells are {[c.id for c in self.cells]}")

    @property
    def film_height_nm(self) -> float | None:
        """Thickness of the first patterned layer, or None."""
        for layer in self.layers:
            if layer.get("patterned"):
                return float(layer["thickness_nm"])
        return None

    def response_at(self, wavelength_nm: float) -> tuple[np.ndarray, np.ndarray]:
        """Complex ``(t_long, t_short)`` per cell at ``wavelength_nm``.

        Linear interpolation of real and imaginary parts between tabulated wavelengths.

        Raises
        ------
        LibraryError
            When the library has no responses or the wavelength is outside the tabulated band.
        """
        where = self.source_path or self.name
        if not self.has_responses:
            raise LibraryError(f"{where}: library has no optical responses (geometry only); "
                               "build it with 'metalay cells build' or import responses with 'metalay cells import'")
        wl = self.wavelengths_nm
        lo, hi = float(wl[0]), float(wl[-1])
        if not (lo - 1e-9 <= wavelength_nm <= hi + 1e-9):
            raise LibraryError(f"{where}: wavelength_nm = {wavelength_nm:g} is outside the tabulated band "
                               f"[{lo:g}, {hi:g}] nm")
        if wl.size == 1:
            return self.t_long[:, 0].copy(), self.t_short[:, 0].copy()
        k = int(np.clip(np.searchsorted(wl, wavelength_nm) - 1, 0, wl.size - 2))
        f = (wavelength_nm - wl[k]) / (wl[k + 1] - wl[k])
        tl = (1 - f) * self.t_long[:, k] + f * self.t_long[:, k + 1]
        ts = (1 - f) * self.t_short[:, k] + f * self.t_short[:, k + 1]
        return tl, ts


def stack_side(mode: str, incident_medium: str, exit_medium: str) -> str | None:
    """The side a library's responses were computed for, derived from its stack (the loader's default).

    The solver lights a cell from its incident medium. Reflection: always ``"structures"`` (a mirror below the
    cells). Transmission: ``"structures"`` when the incident medium is open (air or vacuum) and the exit medium is
    not (light arrives onto the patterned face of a substrate), ``"substrate"`` in the opposite case (it arrives
    through the substrate and leaves into the open medium around the structures); None when both or neither are
    open (the stack alone cannot tell; a design must then state ``design.lit_from``).
    """
    if mode == "reflection":
        return "structures"
    inc_open = incident_medium.strip().lower() in _OPEN_MEDIA
    exit_open = exit_medium.strip().lower() in _OPEN_MEDIA
    if inc_open and not exit_open:
        return "structures"
    if exit_open and not inc_open:
        return "substrate"
    return None


def bundled_library_names() -> list[str]:
    """Names of the libraries shipped with metalay."""
    root = resources.files("metalay.libraries")
    return sorted(p.name[: -len(".library.json")] for p in root.iterdir() if p.name.endswith(".library.json"))


def _resolve(name_or_path: str | Path) -> Path:
    text = str(name_or_path)
    candidate = Path(text)
    if text.endswith(".library.json") or candidate.suffix == ".json" or "/" in text or "\\" in text:
        if not candidate.is_file():
            raise LibraryError(f"{candidate}: cell library file not found")
        return candidate
    root = resources.files("metalay.libraries")
    entry = root / f"{text}.library.json"
    if entry.is_file():
        return Path(str(entry))
    raise LibraryError(f"library {text!r} not found; bundled libraries are {bundled_library_names()} "
                       "(or give a path to a *.library.json file)")


def _need(data: dict, key: str, where: str, kind=None, allowed=None):
    if key not in data:
        raise LibraryError(f"{where}: missing key '{key}'")
    value = data[key]
    if kind is not None and not isinstance(value, kind) or isinstance(value, bool) and kind in (float, (int, float)):
        raise LibraryError(f"{where}: key '{key}' = {value!r} has the wrong type (expected {_kind_name(kind)})")
    if allowed is not None and value not in allowed:
        raise LibraryError(f"{where}: key '{key}' = {value!r} is not one of {list(allowed)}")
    return value


def _kind_name(kind) -> str:
    if isinstance(kind, tuple):
        return " or ".join(k.__name__ for k in kind)
    return kind.__name__


def _positive(data: dict, key: str, where: str) -> float:
    value = _need(data, key, where, (int, float))
    if not math.isfinite(value) or value <= 0:
        raise LibraryError(f"{where}: key '{key}' = {value!r} must be a finite number > 0")
    return float(value)


def load_library(name_or_path: str | Path) -> CellLibrary:
    """Load a bundled library by name or a library file by path.

    Parameters
    ----------
    name_or_path : str or Path
        A bundled name such as ``"tio2-nanofin-532"`` or a path to ``<name>.library.json``.

    Returns
    -------
    CellLibrary
    """
    path = _resolve(name_or_path)
    where = str(path)
    raw = path.read_bytes()
    try:
        data = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise LibraryError(f"{where}: not valid JSON ({exc})") from exc
    if not isinstance(data, dict):
        raise LibraryError(f"{where}: top level must be a JSON object")
    _need(data, "format", where, str, (FORMAT_NAME,))
    version = _need(data, "format_version", where, int)
    if version != FORMAT_VERSION:
        raise LibraryError(f"{where}: key 'format_version' = {version} is not supported (allowed: {FORMAT_VERSION})")
    cells_raw = _need(data, "cells", where, list)
    if not cells_raw:
        raise LibraryError(f"{where}: key 'cells' is empty (need at least one cell)")
    cells = []
    seen = set()
    for k, c in enumerate(cells_raw):
        cw = f"{where}: cells[{k}]"
        if not isinstance(c, dict):
            raise LibraryError(f"{cw} must be an object")
        cid = _need(c, "id", cw, str)
        if cid in seen:
            raise LibraryError(f"{cw}: duplicate id {cid!r}")
        seen.add(cid)
        kind = _need(c, "kind", cw, str, tuple(CELL_KINDS))
        dims = tuple((key, _positive(c, key, cw)) for key in CELL_KINDS[kind])
        cells.append(CellSpec(id=cid, kind=kind, layer=str(c.get("layer", "")), dims_nm=dims))
    layers = _need(data, "layers", where, list)
    for k, layer in enumerate(layers):
        lw = f"{where}: layers[{k}]"
        if not isinstance(layer, dict):
            raise LibraryError(f"{lw} must be an object")
        _need(layer, "material", lw, str)
        _positive(layer, "thickness_nm", lw)
    lib = CellLibrary(
        name=_need(data, "name", where, str),
        description=str(data.get("description", "")),
        mode=_need(data, "mode", where, str, _MODES),
        phase_mechanism=_need(data, "phase_mechanism", where, str, _MECHANISMS),
        design_wavelength_nm=_positive(data, "design_wavelength_nm", where),
        period_nm=_positive(data, "period_nm", where),
        lattice=_need(data, "lattice", where, str, _LATTICES),
        incident_medium=_need(data, "incident_medium", where, str),
        exit_medium=_need(data, "exit_medium", where, str),
        layers=tuple(layers),
        rules=dict(_need(data, "rules", where, dict)),
        provenance=dict(_need(data, "provenance", where, dict)),
        cells=tuple(cells),
        source_path=where,
        extra={k: v for k, v in data.items() if k not in _KNOWN_KEYS},
        lit_from=_lit_from(data, where),
    )
    digest = hashlib.sha256(raw)
    resp_name = data.get("responses_file")
    if resp_name:
        resp_path = path.parent / resp_name
        if not resp_path.is_file():
            raise LibraryError(f"{where}: responses_file {resp_name!r} not found beside the library")
        resp_raw = resp_path.read_bytes()
        digest.update(resp_raw)
        arrays = _parse_responses(resp_raw, str(resp_path), [c.id for c in cells])
        lib = _with(lib, **arrays)
    if lib.phase_mechanism == "spin_decoupled":
        _check_decoupled(lib, where)
    return check_physical(_with(lib, sha256=digest.hexdigest()))


def _check_decoupled(lib: CellLibrary, where: str) -> None:
    """A spin-decoupled library needs anisotropic cells and responses (the mapping chooses cells by their
    conversion phase ``arg((t_long - t_short)/2)``, :mod:`metalay.cells.decoupled`)."""
    for cell in lib.cells:
        if cell.kind not in _DECOUPLED_KINDS:
            raise LibraryError(f"{where}: cell {cell.id!r} has kind {cell.kind!r}; a spin_decoupled library needs "
                               f"anisotropic cells, one of {list(_DECOUPLED_KINDS)}")
    if not lib.has_responses:
        raise LibraryError(f"{where}: a spin_decoupled library needs responses (responses_file): its cells are "
                           "chosen per site by their conversion phase")


_KNOWN_KEYS = {"format", "format_version", "name", "description", "mode", "phase_mechanism", "design_wavelength_nm",
               "period_nm", "lattice", "incident_medium", "exit_medium", "layers", "rules", "provenance", "cells",
               "responses_file", "lit_from"}


def _lit_from(data: dict, where: str) -> str | None:
    """The optional ``lit_from`` key (None when absent or null: :attr:`CellLibrary.side` derives it)."""
    value = data.get("lit_from")
    if value is None:
        return None
    if value not in LIT_FROM:
        raise LibraryError(f"{where}: key 'lit_from' = {value!r} is not one of {list(LIT_FROM)}")
    if data.get("mode") == "reflection" and value != "structures":
        raise LibraryError(f"{where}: key 'lit_from' = {value!r}: a reflection library is lit from the structure "
                           "side (allowed: 'structures')")
    return value


def _with(lib: CellLibrary, **changes) -> CellLibrary:
    from dataclasses import replace

    return replace(lib, **changes)


def _parse_responses(raw: bytes, where: str, cell_ids: list[str]) -> dict:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise LibraryError(f"{where}: not UTF-8 text") from exc
    reader = csv.reader(io.StringIO(text))
    header = next(reader, None)
    if header is None or tuple(h.strip() for h in header) != CSV_HEADER:
        raise LibraryError(f"{where}: header must be exactly {','.join(CSV_HEADER)}")
    rows: dict[str, list[tuple[float, ...]]] = {cid: [] for cid in cell_ids}
    for line_no, row in enumerate(reader, start=2):
        if not row:
            continue
        if len(row) != len(CSV_HEADER):
            raise LibraryError(f"{where}:{line_no}: expected {len(CSV_HEADER)} columns, got {len(row)}")
        cid = row[0]
        if cid not in rows:
            raise LibraryError(f"{where}:{line_no}: cell_id {cid!r} is not a cell of the library")
        try:
            values = tuple(float(v) for v in row[1:])
        except ValueError as exc:
            raise LibraryError(f"{where}:{line_no}: non-numeric value ({exc})") from exc
        if not all(math.isfinite(v) for v in values[:5]) or values[0] <= 0:
            raise LibraryError(f"{where}:{line_no}: wavelength_nm and t values must be finite, wavelength_nm > 0 "
                               "(only power_long/power_short may be nan)")
        rows[cid].append(values)
    wavelengths = None
    for cid, vals in rows.items():
        wl = tuple(v[0] for v in vals)
        if not wl:
            raise LibraryError(f"{where}: no rows for cell_id {cid!r}")
        if list(wl) != sorted(set(wl)):
            raise LibraryError(f"{where}: rows of cell_id {cid!r} must have strictly increasing wavelength_nm")
        if wavelengths is None:
            wavelengths = wl
        elif wl != wavelengths:
            raise LibraryError(f"{where}: cell_id {cid!r} is tabulated at different wavelengths than {cell_ids[0]!r}")
    table = np.array([rows[cid] for cid in cell_ids], dtype=np.float64)  # (C, W, 7)
    return dict(
        wavelengths_nm=np.array(wavelengths, dtype=np.float64),
        t_long=table[:, :, 1] + 1j * table[:, :, 2],
        t_short=table[:, :, 3] + 1j * table[:, :, 4],
        power_long=table[:, :, 5],
        power_short=table[:, :, 6],
    )


#: Allowance on power ratios for rounding (a passive cell cannot give out more power than it receives).
PASSIVITY_TOLERANCE = 1e-6


def check_physical(lib: CellLibrary) -> CellLibrary:
    """Refuse a library whose responses are not those of a passive cell; return it unchanged otherwise.

    Checked at every cell and wavelength: ``|t|^2 <= power <= 1`` for each principal polarisation (``power`` =
    total power of all orders on the output side; only ``|t|^2 <= 1`` when it is unknown), ``conversion + leakage
    = (|t_long|^2 + |t_short|^2)/2 <= 1``, all within :data:`PASSIVITY_TOLERANCE`; and, where the builder recorded
    the energy balance (``provenance.solver.convergence.points``), ``R + T <= 1`` everywhere and
    ``|R + T - 1| <= energy_tolerance`` for a lossless stack.

    Raises
    ------
    LibraryError
        One line naming the library, the cell, the wavelength and the value.

    References
    ----------
    Poynting's theorem (energy conservation; passivity of a structure without gain).
    """
    if not lib.has_responses:
        return lib
    where = lib.source_path or lib.name
    tol = PASSIVITY_TOLERANCE
    nan = np.full(lib.t_long.shape, np.nan)
    pl = lib.power_long if lib.power_long is not None else nan
    ps = lib.power_short if lib.power_short is not None else nan
    tests = []
    for label, t, pw in (("long", lib.t_long, pl), ("short", lib.t_short, ps)):
        t2 = np.abs(t) ** 2
        tests.append((t2 > 1 + tol, t2, f"|t_{label}|^2 = {{v:.9g}} > 1"))
        tests.append((np.isfinite(pw) & (pw > 1 + tol), pw, f"power_{label} = {{v:.9g}} > 1"))
        tests.append((np.isfinite(pw) & (pw < -tol), pw, f"power_{label} = {{v:.9g}} < 0"))
        tests.append((np.isfinite(pw) & (t2 > pw + tol), t2 - pw,
                      f"|t_{label}|^2 exceeds power_{label} (all orders) by {{v:.3g}}"))
    both = (np.abs(lib.t_long) ** 2 + np.abs(lib.t_short) ** 2) / 2
    tests.append((both > 1 + tol, both, "conversion + leakage = {v:.9g} > 1"))
    for bad, val, text in tests:
        if np.any(bad):
            c, k = np.argwhere(bad)[0]
            raise LibraryError(f"{where}: cell {lib.cells[c].id!r} at {lib.wavelengths_nm[k]:g} nm: "
                               + text.format(v=float(val[c, k])) + " (not physical for a passive cell)")
    conv = ((lib.provenance or {}).get("solver") or {}).get("convergence")
    if isinstance(conv, dict) and isinstance(conv.get("points"), list):
        etol = float(conv.get("energy_tolerance", tol))
        for pt in conv["points"]:
            for key in ("r_plus_t_long", "r_plus_t_short"):
                v = float(pt.get(key, 1.0))
                if v > 1 + max(etol, tol) or (pt.get("lossless") and abs(v - 1) > etol):
                    raise LibraryError(f"{where}: cell {pt.get('cell_id')!r} at {pt.get('wavelength_nm')} nm: "
                                       f"R + T = {v:.9g} ({key.rsplit('_', 1)[1]} axis) breaks energy conservation "
                                       f"(allowed {'1 +- ' if pt.get('lossless') else '<= 1 + '}{etol:g})")
    return lib


def library_to_json(lib: CellLibrary) -> str:
    """Deterministic JSON text of a library's metadata (sorted keys, two-space indent, trailing newline)."""
    data = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "name": lib.name,
        "description": lib.description,
        "mode": lib.mode,
        "phase_mechanism": lib.phase_mechanism,
        "design_wavelength_nm": float(lib.design_wavelength_nm),
        "period_nm": float(lib.period_nm),
        "lattice": lib.lattice,
        "incident_medium": lib.incident_medium,
        "exit_medium": lib.exit_medium,
        "layers": list(lib.layers),
        "rules": lib.rules,
        "provenance": lib.provenance,
        "cells": [{"id": c.id, "kind": c.kind, "layer": c.layer, **{k: float(v) for k, v in c.dims_nm}}
                  for c in lib.cells],
        "responses_file": f"{lib.name}.responses.csv" if lib.has_responses else None,
        "lit_from": lib.side,
        **lib.extra,
    }
    return json.dumps(data, sort_keys=True, indent=2) + "\n"


def responses_to_csv(lib: CellLibrary) -> str:
    """Deterministic CSV text of a library's responses (rows by cell order, then wavelength)."""
    out = io.StringIO()
    out.write(",".join(CSV_HEADER) + "\n")
    nan = np.full_like(lib.wavelengths_nm, np.nan)
    pl = lib.power_long if lib.power_long is not None else None
    ps = lib.power_short if lib.power_short is not None else None
    for c, cell in enumerate(lib.cells):
        p_long = pl[c] if pl is not None else nan
        p_short = ps[c] if ps is not None else nan
        for w, wl in enumerate(lib.wavelengths_nm):
            vals = (wl, lib.t_long[c, w].real, lib.t_long[c, w].imag, lib.t_short[c, w].real,
                    lib.t_short[c, w].imag, p_long[w], p_short[w])
            out.write(cell.id + "," + ",".join(repr(float(v)) for v in vals) + "\n")
    return out.getvalue()


def save_library(lib: CellLibrary, folder: str | Path) -> list[Path]:
    """Write ``<name>.library.json`` (and ``<name>.responses.csv`` when there are responses) into ``folder``.

    Files are written atomically and byte-for-byte deterministically; a library that is not physical
    (:func:`check_physical`) is refused before anything is written.
    """
    check_physical(lib)
    folder = Path(folder)
    written = [atomic_write_bytes(folder / f"{lib.name}.library.json", library_to_json(lib).encode())]
    if lib.has_responses:
        written.append(atomic_write_bytes(folder / f"{lib.name}.responses.csv", responses_to_csv(lib).encode()))
    return written
