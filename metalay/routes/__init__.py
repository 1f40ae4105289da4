"""Other fabrication routes from the same design: etched phase plates, fork gratings, SLM images, orientation maps.

===================  ==================================================================  ===========================
module               stage                                                               public entry
===================  ==================================================================  ===========================
``routes.py``        route settings (``[routes]`` table), etch masks, fork gratings,     ``parse_routes``,
                     SLM images, orientation maps, comparison of the routes              ``etch_masks``,
                                                                                         ``fork_grating``,
                                                                                         ``slm_image``,
                                                                                         ``compare_routes``
``_routes_geom.py``  contouring on a raster, boundary refinement, hole-free GDSII        (inside this package)
                     pieces
===================  ==================================================================  ===========================

Imports: design, mask.mapping, io.writer, checks.grid and checks.oam, util.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "parse_routes": "routes",
    "etch_masks": "routes",
    "fork_grating": "routes",
    "slm_image": "routes",
    "orientation_map": "routes",
    "compare_routes": "routes",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
