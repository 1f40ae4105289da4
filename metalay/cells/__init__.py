"""Cells stage: unit-cell libraries, their outlines, and the solver that builds them.

================  ====================================================================  ===========================
module            stage                                                                 public entry
================  ====================================================================  ===========================
``library.py``    cell library format (JSON + CSV): cells, rules, responses, provenance  ``load_library``,
                                                                                        ``save_library``
``cellkinds.py``  outline of each cell kind at rotation 0 (nm, counter-clockwise)       ``outline_nm``
``rcwa.py``       unit-cell solver (Fourier modal method, S-matrices), batched          ``solve``
``materials.py``  optical constants (pinned database, Malitson formula, user tables)    ``get_material``
``decoupled.py``  spin-decoupled cells: per-spin phase relations, choice of half-wave    ``cell_targets``,
                  cells for N conversion-phase levels, the library's level report       ``pick_spin_levels``
``cellbuild.py``  library builder (sweep, rule filter, pick, spectra, convergence);     ``build_library``,
                  import of responses simulated elsewhere                               ``import_responses``
``biascells.py``  responses of cells grown by a CD bias, solved on demand and cached    ``BiasedCells``
================  ====================================================================  ===========================

Imports: :mod:`metalay.errors`, :mod:`metalay.validate`, :mod:`metalay.util`.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "load_library": "library",
    "save_library": "library",
    "CellLibrary": "library",
    "CellSpec": "library",
    "CELL_KINDS": "library",
    "outline_nm": "cellkinds",
    "solve": "rcwa",
    "get_material": "materials",
    "cell_targets": "decoupled",
    "spin_phases": "decoupled",
    "pick_spin_levels": "decoupled",
    "load_build_spec": "cellbuild",
    "build_library": "cellbuild",
    "import_responses": "cellbuild",
    "BiasedCells": "biascells",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
