"""Mask files in and out: reading any GDSII/OASIS into flat arrays, writing GDSII (and OASIS through gdstk).

=============  ===========================================================================  =====================
module         stage                                                                        public entry
=============  ===========================================================================  =====================
``gdsread.py`` GDSII (vectorised record walk, references resolved, hostile input bounded)   ``read_mask``,
               or OASIS -> ``FlatPolygons``; the database unit becomes ``db_unit_nm`` here   ``mask_info``
``writer.py``  own streaming flat-GDSII writer; gdstk builders for OASIS and hierarchy      ``GdsStream``,
                                                                                            ``boundary_records``
=============  ===========================================================================  =====================

Imports: :mod:`metalay.errors`, :mod:`metalay.util`, the polygon records of :mod:`metalay.mask.layout`.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "read_mask": "gdsread",
    "mask_info": "gdsread",
    "FlatPolygons": "gdsread",
    "file_sha256": "gdsread",
    "GdsStream": "writer",
    "boundary_records": "writer",
    "write_gdstk_library": "writer",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
