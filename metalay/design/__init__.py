"""Design stage: a TOML design file -> a validated ``Design`` -> target phase -> lattice sites.

=============  ======================================================================  ==========================
module         stage                                                                   public entry
=============  ======================================================================  ==========================
``spec.py``    design file -> frozen, validated ``Design`` (errors name file, key,      ``load_design``,
               value, allowed range; read through :mod:`metalay.validate`)             ``parse_design``
``phase.py``   phase terms (vortex, tilt, lens, axicon, q-plate, multiplex, map), each  ``target_phase``,
               a pure vectorised function of ``(x_um, y_um)``                          ``phase_gradient``
``lattice.py`` sites of whole cells inside the aperture (square or hexagonal); a tile  ``sample_sites``
               is a band of rows
``side.py``    which face the mask shows, which side the light arrives from: the      ``Facing``,
               frame of the leaving light (mirror, rotation sign)                      ``resolve_facing``
``limits.py``  verdict thresholds with units (pass / warn / fail), defaults and        ``judge``, ``Limits``
               design overrides (``[checks.limits]``)
``logpolar.py`` log-polar mode sorter elements as phase terms (kind ``mode_sorter``)   ``sorter_parameters``,
               and the choice of their parameters                                      ``parse_sorter_term``
=============  ======================================================================  ==========================

Imports: :mod:`metalay.errors`, :mod:`metalay.validate` only.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "load_design": "spec",
    "parse_design": "spec",
    "Design": "spec",
    "target_phase": "phase",
    "phase_gradient": "phase",
    "PHASE_TERM_KINDS": "phase",
    "sample_sites": "lattice",
    "Aperture": "lattice",
    "Lattice": "lattice",
    "Facing": "side",
    "resolve_facing": "side",
    "Limits": "limits",
    "judge": "limits",
    "sorter_parameters": "logpolar",
    "SorterElement": "logpolar",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
