"""Plan a log-polar mode sorter: parameters from a wavelength, an input aperture and a spot spacing, and the
element design files (one per element, kind ``mode_sorter``) ready for ``metalay compile``.

The set-up keys are validated exactly as in a design file (:func:`metalay.design.logpolar.parse_sorter_term`
through :class:`metalay.validate.TomlTable`), so a plan that passes here compiles; the written files are read
back with :func:`metalay.design.spec.parse_design` before they are written.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from metalay.design.logpolar import SorterDesign, element_aperture, parse_sorter_term
from metalay.errors import DesignError
from metalay.validate import TomlTable

__all__ = ["SorterPlan", "SETUP_KEYS", "plan_sorter", "element_design_text", "write_element_designs"]

#: Set-up keys of a ``mode_sorter`` table (every element file of one sorter carries the same values).
SETUP_KEYS = ("input_diameter_um", "inner_diameter_um", "spot_spacing_um", "focal_length_mm", "n_copies",
              "min_waves", "max_ray_angle_deg", "copier_angle_deg")

_ROLE = {1: "unwrapper", 2: "corrector", 3: "copier", 4: "copy-phase"}
_WHAT = {1: "unwrapper + lens f", 2: "phase corrector + lens f", 3: "fan-out grating + two lenses f_c",
         4: "per-copy phase correction + lens f_c"}


@dataclass(frozen=True)
class SorterPlan:
    """A sorter's parameters and the suggested aperture of every element.

    Attributes
    ----------
    setup : SorterDesign
    keys : dict
        The ``mode_sorter`` set-up keys as given (the same in every element file).
    apertures : tuple of dict
        ``[aperture]`` table per element (:func:`metalay.design.logpolar.element_aperture`).
    """

    setup: SorterDesign
    keys: dict
    apertures: tuple

    @property
    def n_elements(self) -> int:
        return 2 if self.setup.n_copies == 1 else 4

    def summary(self) -> dict:
        """JSON-ready parameters."""
        s = self.setup
        return {"wavelength_nm": s.wavelength_nm, "a_um": s.a_um, "b_um": s.b_um,
                "element_spacing_f_mm": s.focal_length_mm, "fourier_focal_length_F_mm": s.fourier_focal_length_mm,
                "copier_focal_length_mm": s.copier_focal_length_mm, "n_copies": s.n_copies,
                "corrector_waves": s.corrector_waves, "spot_spacing_um": s.spot_spacing_um,
                "spot_sign": s.spot_sign, "max_local_frequency_per_um": s.max_local_frequency_per_um(),
                "elements": [{"element": k, "role": _WHAT[k], "aperture": a}
                             for k, a in enumerate(self.apertures, start=1)], "keys": dict(self.keys)}


def plan_sorter(keys: dict, *, wavelength_nm: float, where: str = "command line", max_charge: int = 5) -> SorterPlan:
    """Validate the set-up keys (as a design file would) and choose the parameters.

    Parameters
    ----------
    keys : dict
        ``mode_sorter`` set-up keys (:data:`SETUP_KEYS`; absent ones take their defaults).
    wavelength_nm : float
        Design wavelength, 100..20000 nm.
    where : str
        Name used in error messages.
    max_charge : int
        Largest ``|l|`` element 3 (the copier's grating plane) must pass, 1..50.

    Returns
    -------
    SorterPlan

    Raises
    ------
    DesignError
        One line naming the key, the value and the allowed range.
    """
    if not (isinstance(wavelength_nm, (int, float)) and 100.0 <= wavelength_nm <= 20000.0):
        raise DesignError(f"{where}: wavelength_nm = {wavelength_nm!r}: out of range, allowed (>= 100.0 and <= "
                          "20000.0)")
    if not (isinstance(max_charge, int) and 1 <= max_charge <= 50):
        raise DesignError(f"{where}: max_charge = {max_charge!r}: allowed integers 1..50")
    given = {k: v for k, v in keys.items() if v is not None}
    unknown = sorted(set(given) - set(SETUP_KEYS))
    if unknown:
        raise DesignError(f"{where}: unknown key '{unknown[0]}' (allowed here: {sorted(SETUP_KEYS)})")
    table = TomlTable(dict(given, kind="mode_sorter", element=1), where)
    term = parse_sorter_term(table, float(wavelength_nm))
    setup = term.setup
    n = 2 if setup.n_copies == 1 else 4
    return SorterPlan(setup, given, tuple(element_aperture(setup, k, max_charge=max_charge) for k in range(1, n + 1)))


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(float(v))
    return '"' + str(v).replace("\\", "\\\\").replace('"', '\\"') + '"'


def element_design_text(plan: SorterPlan, element: int, *, name: str, library: str, period_nm: float,
                        lattice: str = "square", input_spin: int = 1) -> str:
    """The design file (TOML text) of one element: ``[design]``, the ``mode_sorter`` term, the suggested
    aperture, the lattice, and ``[checks]`` with the single-element optical check off (the sorter check replaces
    it).  Element ``k`` is written for spin ``input_spin * (-1)^(k - 1)`` (each element receives the converted,
    spin-flipped light of the one before)."""
    k = int(element)
    spin = int(input_spin) * (-1) ** (k - 1)
    lines = [f"# Element {k} of {plan.n_elements} of a log-polar OAM mode sorter ({_WHAT[k]}), written by "
             "`metalay sorter plan`.",
             "# Compile all elements and check them together: metalay sorter compile <element files in order>",
             "[design]", f"name = {_toml_value(f'{name}-{_ROLE[k]}')}",
             f"wavelength_nm = {_toml_value(float(plan.setup.wavelength_nm))}",
             f"input_spin = {spin}", f"library = {_toml_value(library)}", "", "[[phase]]", 'kind = "mode_sorter"',
             f"element = {k}"]
    lines += [f"{key} = {_toml_value(plan.keys[key])}" for key in SETUP_KEYS if key in plan.keys]
    lines += ["", "[aperture]"] + [f"{key} = {_toml_value(v)}" for key, v in plan.apertures[k - 1].items()]
    lines += ["", "[lattice]", f"kind = {_toml_value(lattice)}", f"period_nm = {_toml_value(float(period_nm))}",
              "", "[checks]", "rules = true", "optics = false", ""]
    return "\n".join(lines)


def write_element_designs(plan: SorterPlan, out_dir, *, name: str, library: str, period_nm: float,
                          lattice: str = "square", input_spin: int = 1) -> list[Path]:
    """Write ``<name>-<role>.toml`` for every element (validated by parsing before anything is written).

    Returns
    -------
    list of Path
        The files, in element order.
    """
    import tomllib

    from metalay.design.spec import parse_design
    from metalay.util.atomic import atomic_write_text, ensure_dir

    if not name or len(name) > 48 or not all(c.isalnum() or c in "-_." for c in name):
        raise DesignError(f"command line: --name = {name!r}: use 1 to 48 characters from letters, digits, '-', "
                          "'_' and '.'")
    if not (isinstance(period_nm, (int, float)) and np.isfinite(period_nm) and 10.0 <= period_nm <= 1e5):
        raise DesignError(f"command line: --period-nm = {period_nm!r}: out of range, allowed (>= 10.0 and <= "
                          "100000.0)")
    texts = {}
    for k in range(1, plan.n_elements + 1):  # 2 or 4 elements
        text = element_design_text(plan, k, name=name, library=library, period_nm=period_nm, lattice=lattice,
                                   input_spin=input_spin)
        fname = f"{name}-{_ROLE[k]}.toml"
        parse_design(tomllib.loads(text), where=fname, base_dir=Path(out_dir))
        texts[fname] = text
    out = ensure_dir(out_dir)
    return [atomic_write_text(out / fname, text) for fname, text in texts.items()]
