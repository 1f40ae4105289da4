"""Mask files in and out: reading any GDSII/OASIS into flat arrays, writing GDSII and OASIS as streams.

=============  ===========================================================================  =====================
module         stage                                                                        public entry
=============  ===========================================================================  =====================
``gdsread.py`` GDSII (vectorised record walk, references resolved, hostile input bounded)   ``read_mask``,
               or OASIS -> ``FlatPolygons``; the database unit becomes ``db_unit_nm`` here   ``mask_info``,
                                                                                            ``mask_format``
``stream_read.py`` the same reading as a stream of polygon chunks (never the whole flat mask),  ``iter_mask_chunks``,
                   and polygon counts without flattening                                    ``count_polygons``
``_oasis_stream.py`` OASIS for ``stream_read``: a survey pass (counted, nothing expanded), then
                   each cell parsed again and expanded a bounded piece at a time
``writer.py``  own streaming GDSII writer (cells spooled); gdstk builders (bench baseline)  ``GdsStream``,
                                                                                            ``boundary_records``
``oasis_read.py``  OASIS -> flat polygon arrays with an own parser (no C extension), every     ``read_oasis``,
                   count checked before anything is expanded                                ``parse_oasis``
``oasis_write.py`` streaming OASIS writer: tile by tile, repetitions, CBLOCK, name tables,  ``OasisStream``
                   validation signature, byte-deterministic; pure record encoders
``_oasis_codec.py`` OASIS primitives used by both sides (integers, reals, deltas, point lists, repetitions)
=============  ===========================================================================  =====================

Imports: :mod:`metalay.errors`, :mod:`metalay.util`, the polygon records of :mod:`metalay.mask.layout`.
"""

from metalay.util._lazy import lazy_entries

_ENTRIES = {
    "read_mask": "gdsread",
    "mask_info": "gdsread",
    "mask_format": "gdsread",
    "FlatPolygons": "gdsread",
    "file_sha256": "gdsread",
    "iter_mask_chunks": "stream_read",
    "count_polygons": "stream_read",
    "GdsStream": "writer",
    "boundary_records": "writer",
    "write_gdstk_library": "writer",
    "read_oasis": "oasis_read",
    "parse_oasis": "oasis_read",
    "OasisStream": "oasis_write",
}
__all__ = sorted(_ENTRIES)
__getattr__, __dir__ = lazy_entries(__name__, _ENTRIES)
