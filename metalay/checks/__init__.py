"""Checks of a written mask: design rules and the optical check, with their reports.

==============  ==========================================================================  =======================
module          stage                                                                       public entry
==============  ==========================================================================  =======================
``rules.py``    design rules on flat polygons (STRtree path + lattice fast path, equal),    ``check_mask``,
                rules files, JSON report, marker GDSII                                      ``load_rules``
``rules_stream.py`` the same rules band by band with a halo, for masks too large to hold; report  ``check_mask_tiled``
                identical to ``check_mask`` (each violation owned by one band)
``decode.py``   flat polygons -> lattice site, cell, rotation                               ``decode_sites``
``grid.py``     the FFT-centred grid, far field with angular axes, angular spectrum         ``far_field``
``oam.py``      OAM (spiral) spectrum: polar resampling + azimuthal FFT                     ``oam_spectrum``
``fringes.py``  simulated interferogram and an independent reading of the charge            ``read_charge``
``farpoints.py`` far field evaluated exactly at chosen directions (direct sum, zoom), no     ``far_field_at_sites``
                FFT padding involved
``optics.py``   optical check: Jones algebra per site -> near field -> far field, OAM,      ``check_optics``,
                spots, crosstalk, lens; one evaluation path shared with the studies         ``evaluate_elements``
``optics_stream.py`` optical check of a mask too large to hold: spot far fields from block    ``check_optics_streamed``
                sums accumulated tile by tile, with a derived error bound
``_stream_figures.py`` its OAM spectrum (ring x sector sums), fringe reading (block-averaged
                near field), crosstalk (exact site sums) and lens focal spot (focal-plane
                block sums), each with its bound or method (inside checks)
``spinoptics.py`` optical check of a spin-decoupled mask: each input spin against its own  ``check_spin_optics``
                target, crosstalk between the two targets, figures for both
``plots.py``    deterministic PNG figures                                                   ``png_bytes``
``report.py``   the single-page HTML report                                                 ``render_html``
``steps.py``    the checks a compile runs, as ``MaskCheck`` steps                           ``default_checks``
==============  ==========================================================================  =======================

Imports: design, cells, io, mask (never :mod:`metalay.mask.compile`), util.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "check_mask": "rules",
    "load_rules": "rules",
    "parse_rules": "rules",
    "RuleSet": "rules",
    "check_mask_tiled": "rules_stream",
    "check_optics_streamed": "optics_stream",
    "decode_sites": "decode",
    "far_field": "grid",
    "far_field_at_sites": "farpoints",
    "oam_spectrum": "oam",
    "read_charge": "fringes",
    "check_optics": "optics",
    "OpticsOptions": "optics",
    "evaluate_elements": "optics",
    "target_from_design": "optics",
    "check_spin_optics": "spinoptics",
    "render_html": "report",
    "default_checks": "steps",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
