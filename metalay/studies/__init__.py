"""Studies over compiled masks: library comparison and the fabrication-tolerance Monte Carlo.

=============  ==============================================================================  ====================
module         stage                                                                           public entry
=============  ==============================================================================  ====================
``study.py``   compile per library and compare (rules margins, optics, band); Monte Carlo over  ``compare_libraries``,
               CD bias, rotation error, missing elements, detuning, evaluated with             ``tolerance_study``
               :func:`metalay.checks.optics.evaluate_elements` on the decoded mask
``supercell.py`` the side convention proved by the solver: a written blazed grating solved whole    ``supercell_rows``
               (RCWA supercell) per side and spin, against the optical check's prediction
=============  ==============================================================================  ====================

Imports: checks, mask (``compile_mask``), design, cells, io, util.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "compare_libraries": "study",
    "tolerance_study": "study",
    "ToleranceSettings": "study",
    "site_model": "study",
    "evaluate_sites": "study",
    "supercell_rows": "supercell",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
