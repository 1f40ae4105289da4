"""Mask file input and output of metalay's own (no C extension in the parsing of untrusted bytes).

Map
---
``oasis_read``
    :func:`~metalay.io.oasis_read.read_oasis` (OASIS -> flat polygon arrays, every count checked before anything
    is expanded) and :func:`~metalay.io.oasis_read.parse_oasis` (cells, own geometry, placements).
``oasis_write``
    :class:`~metalay.io.oasis_write.OasisStream`: a streaming OASIS writer (tile by tile, repetitions, CBLOCK
    compression, name tables, validation signature, byte-deterministic) and its pure record encoders.
``_oasis_codec``
    OASIS primitives used by both sides: integers, reals, strings, deltas, point lists, repetitions.
"""
